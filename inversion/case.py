"""The case file: one TOML file that describes one inversion problem.

:func:`load_case` is the single entry point that reads and checks a case; everything
downstream trusts the :class:`Case` it returns. Every error names the file and the key.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from dataclasses import replace as _replace
from pathlib import Path
from typing import Any

import pandas as pd

import components
from components._tables import check_composition_frame, read_csv_checked, read_text_checked
from components.units import PLAUSIBLE, check_in_range

from .exceptions import InputError
from .options import check_option
from .volatility import CASE_FORMS

__all__ = ["Case", "Target", "CoreSettings", "load_case", "read_target", "ISOTOPE_CARRIERS",
           "STAGED_ISOTOPE_CARRIERS", "CONDENSATION_TABLES", "reference_elements",
           "AccretionSettings"]

#: Isotope anomaly -> element that carries it (docs/model.md section 6).
ISOTOPE_CARRIERS: dict[str, str] = {"D17O": "O", "e50Ti": "Ti", "e54Cr": "Cr", "e48Ca": "Ca"}
#: Anomalies carried by siderophile elements: usable only with ``[accretion] stages = 2``
#: (inversion/staged.py), where the mantle's share of each stage's carrier is modelled;
#: one mixture throughout would compare the bulk carrier balance with a mantle that lost
#: most of its early siderophile inventory to the core.
STAGED_ISOTOPE_CARRIERS: dict[str, str] = {"e64Ni": "Ni", "e92Mo": "Mo", "e100Ru": "Ru"}
CONDENSATION_TABLES = {"lodders2003": "tc50_lodders2003", "wood2019": "tc50_wood2019"}

_ALLOWED: dict[str, set[str]] = {
    "": {"title", "target", "building_blocks", "volatility", "core", "late_accretion",
         "isotopes", "elements", "priors", "sampler", "fit", "accretion"},
    "target": {"table", "reference_element", "planet_mass_kg", "mantle_mass_kg",
               "default_uncertainty_pct", "minimum_uncertainty_dex", "normaliser"},
    "building_blocks": {"candidates", "max_mixture_size"},
    "volatility": {"form", "condensation_table"},
    "core": {"mantle_FeO_wt", "dIW", "D", "partitioning", "pressure_GPa", "temperature_K",
             "accretion_steps", "depth_fraction", "cmb_pressure_GPa", "dIW_final",
             "hse_partitioning", "metal_activity"},
    "late_accretion": {"component", "max_fraction"},
    "elements": {"exclude"},
    "fit": {"isotope_window_sigma", "cmf_range"},
    "accretion": {"stages", "late_stage_fraction", "core_mass_fraction"},
    "sampler": {"draws", "tune", "chains", "seed", "target_accept", "cores", "init",
                "smc_draws", "smc_chains", "engine", "jitter", "mass_matrix", "chain_method"},
}


@dataclass(frozen=True)
class Target:
    """The silicate composition to explain (mass fractions, element basis)."""

    composition: pd.Series
    uncertainty: pd.Series
    path: str
    reference_element: str
    planet_mass_kg: float | None
    mantle_mass_kg: float | None
    uncertainty_defaulted: tuple[str, ...]


@dataclass(frozen=True)
class CoreSettings:
    """Core formation: the iron split (mantle FeO or dIW) and effective D overrides."""

    mantle_FeO_wt: float | None
    #: a value, or (low, high) to infer (single-stage only)
    dIW: float | tuple[float, float] | None
    D: dict[str, float]
    #: ``effective`` (constant D) or ``single-stage`` (D of the regressions at P, T, dIW;
    #: :mod:`inversion.conditions`)
    partitioning: str = "effective"
    #: single-stage: one pressure [GPa] or (low, high) to infer by the convex fit
    pressure_GPa: float | tuple[float, float] | None = None
    #: single-stage: a temperature [K], (low, high) to infer, or ``"liquidus"`` (tied to
    #: the pressure)
    temperature_K: float | str | tuple[float, float] | None = None
    #: continuous: ``accretion_steps``, ``depth_fraction``, ``cmb_pressure_GPa``,
    #: ``dIW_start``, ``dIW_final`` (:func:`_continuous`)
    continuous: dict[str, float] | None = None
    #: ``[core] hse_partitioning``: the HSE D set (docs/partitioning.md)
    hse_partitioning: str = "constant"
    #: ``[core] metal_activity``: ``ideal`` or ``epsilon`` (the regressions' activity model,
    #: :data:`inversion.partitioning.ACTIVITY_MODELS`; regression partitioning only)
    metal_activity: str = "ideal"


@dataclass(frozen=True)
class AccretionSettings:
    """``[accretion]``: one mixture throughout (``stages = 1``) or two stages.

    ``late_stage_fraction`` is the mass fraction accreted in the second stage;
    ``core_mass_fraction`` (optional) sets the core/mantle ratio of the siderophile
    retention (default: the convex fit's); ``isotopes`` holds the siderophile systems
    (:data:`STAGED_ISOTOPE_CARRIERS`) that only the staged fit uses.
    """

    stages: int = 1
    late_stage_fraction: float | None = None
    core_mass_fraction: float | None = None
    isotopes: dict[str, tuple[float, float]] = field(default_factory=dict)


@dataclass(frozen=True)
class Case:
    """A parsed, validated case file."""

    title: str
    path: str
    target: Target
    candidates: tuple[components.Component, ...]
    max_mixture_size: int
    volatility_form: str
    condensation_table: str
    core: CoreSettings
    late_component: components.Component | None
    late_max_fraction: float
    isotopes: dict[str, tuple[float, float]]
    exclude: tuple[str, ...]
    priors: dict[str, Any] = field(default_factory=dict)
    sampler: dict[str, Any] = field(default_factory=dict)
    isotope_window_sigma: float = 2.0
    minimum_uncertainty_dex: float = 0.02
    cmf_range: tuple[float, float] | None = None
    normaliser: components.Component | None = None
    accretion: AccretionSettings = field(default_factory=AccretionSettings)

    @property
    def candidate_names(self) -> list[str]:
        """Names of the building-block candidates, in case order."""
        return [c.name for c in self.candidates]


def reference_elements() -> list[str]:
    """Elements allowed as the reference element: lithophile, refractory or main-component,
    and without a partition coefficient into the core (so that no volatile loss and no
    core formation moves the denominator of every ratio)."""
    from .model import default_partition

    props = components.elements()
    part = default_partition()["D"]
    ok = (props["geochemical_class"] == "lithophile") & props["cosmochemical_class"].isin(
        ["refractory", "main_component"])
    return sorted(e for e in props.index[ok] if not part.get(e, 0.0) > 0)


#: Partitioning models of ``[core] partitioning``.
PARTITIONING_MODELS = ("effective", "single-stage", "continuous")
#: ``[core]`` keys of ``partitioning = "continuous"`` (inversion.conditions.fit_continuous)
CONTINUOUS_KEYS = ("accretion_steps", "depth_fraction", "cmb_pressure_GPa", "dIW_final")
#: Pressure range [GPa] the regressions are used in (their experiments reach ~100 GPa).
PRESSURE_LIMITS_GPA = (0.0, 150.0)
#: Temperatures [K] accepted for ``temperature_K``.
TEMPERATURE_LIMITS_K = (1200.0, 6000.0)


def _continuous(core_raw: dict, diw: Any, file: str) -> dict[str, float]:
    """The keys of ``partitioning = "continuous"``, checked: ``accretion_steps`` (integer
    1-200, default 10), ``depth_fraction`` (0-1], default 0.5), ``cmb_pressure_GPa`` (the
    final core-mantle-boundary pressure, required, (0, 400]), the dIW path from ``dIW``
    (required, one value) to ``dIW_final`` (default: the same, constant)."""
    if diw is None or isinstance(diw, tuple):
        raise InputError("partitioning = \"continuous\" needs dIW (one value: the first "
                         "step's; dIW_final sets the last)", file=file, field="core.dIW",
                         value=None if diw is None else list(diw))
    n = core_raw.get("accretion_steps", 10)
    if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= 200:
        raise InputError("accretion_steps must be an integer in 1-200", file=file,
                         field="core.accretion_steps", value=n)
    fr = _num(core_raw.get("depth_fraction", 0.5), file=file, field="core.depth_fraction")
    if not 0.0 < fr <= 1.0:
        raise InputError("depth_fraction must lie in (0, 1]", file=file,
                         field="core.depth_fraction", value=fr)
    if "cmb_pressure_GPa" not in core_raw:
        raise InputError("partitioning = \"continuous\" needs cmb_pressure_GPa (the final "
                         "core-mantle-boundary pressure; the Earth's is 136 GPa)", file=file,
                         field="core.cmb_pressure_GPa")
    pc = _num(core_raw["cmb_pressure_GPa"], file=file, field="core.cmb_pressure_GPa")
    if not 0.0 < pc <= 400.0:
        raise InputError("cmb_pressure_GPa must lie in (0, 400]", file=file,
                         field="core.cmb_pressure_GPa", value=pc)
    d_end = core_raw.get("dIW_final", diw)
    d_end = check_in_range(_num(d_end, file=file, field="core.dIW_final"), "dIW", file=file,
                           field="core.dIW_final")
    return {"accretion_steps": n, "depth_fraction": fr, "cmb_pressure_GPa": pc,
            "dIW_start": float(diw), "dIW_final": float(d_end)}


def _core_conditions(core_raw: dict, D: dict[str, float], file: str
                     ) -> tuple[str, float | tuple[float, float] | None,
                                float | str | tuple[float, float] | None]:
    """``[core] partitioning``, ``pressure_GPa`` and ``temperature_K``, checked."""
    model = check_option("partitioning model", core_raw.get("partitioning", "effective"),
                         PARTITIONING_MODELS, file=file, field="core.partitioning")
    P_raw, T_raw = core_raw.get("pressure_GPa"), core_raw.get("temperature_K")
    if model != "continuous":
        for key in CONTINUOUS_KEYS:
            if key in core_raw:
                raise InputError(f"{key} needs partitioning = \"continuous\"", file=file,
                                 field=f"core.{key}", value=core_raw[key])
    if model == "effective":
        for key, val in (("pressure_GPa", P_raw), ("temperature_K", T_raw)):
            if val is not None:
                raise InputError(f"{key} needs partitioning = \"single-stage\" (the "
                                 "effective D do not depend on the conditions)", file=file,
                                 field=f"core.{key}", value=val)
        return model, None, None
    from .partitioning import DEFAULT_CHOICE

    fixed = sorted(e for e in D if e in DEFAULT_CHOICE)
    if fixed:
        raise InputError(f"{fixed[0]} takes its D from its regression with partitioning = "
                         f"\"{model}\"; remove the D entry", file=file,
                         field=f"core.D.{fixed[0]}", value=D[fixed[0]])
    if model == "continuous":
        for key, val in (("pressure_GPa", P_raw), ("temperature_K", T_raw)):
            if val is not None:
                raise InputError("with partitioning = \"continuous\" each step equilibrates "
                                 "at depth_fraction x the growing core-mantle-boundary "
                                 "pressure, on the liquidus; remove " + key, file=file,
                                 field=f"core.{key}", value=val)
        return model, None, "liquidus"
    if P_raw is None:
        raise InputError("partitioning = \"single-stage\" needs pressure_GPa (a value, or "
                         "[low, high] to infer)", file=file, field="core.pressure_GPa")
    lo_P, hi_P = PRESSURE_LIMITS_GPA
    if isinstance(P_raw, list):
        if len(P_raw) != 2:
            raise InputError("give pressure_GPa as one value or [low, high]", file=file,
                             field="core.pressure_GPa", value=P_raw)
        P = tuple(_num(v, file=file, field="core.pressure_GPa") for v in P_raw)
        if not lo_P <= P[0] < P[1] <= hi_P:
            raise InputError(f"pressure_GPa = [low, high] needs {lo_P:g} <= low < high <= "
                             f"{hi_P:g}", file=file, field="core.pressure_GPa", value=P_raw)
    else:
        P = _num(P_raw, file=file, field="core.pressure_GPa")
        if not lo_P <= P <= hi_P:
            raise InputError(f"pressure_GPa must lie in [{lo_P:g}, {hi_P:g}]", file=file,
                             field="core.pressure_GPa", value=P_raw)
    T: float | str | tuple[float, float] = "liquidus" if T_raw is None else T_raw
    if isinstance(T, list):
        # [low, high]: inferred (inversion.conditions)
        T = tuple(_num(v, file=file, field="core.temperature_K") for v in T)
        if not (len(T) == 2 and TEMPERATURE_LIMITS_K[0] <= T[0] < T[1]
                <= TEMPERATURE_LIMITS_K[1]):
            raise InputError(f"temperature_K = [low, high] needs {TEMPERATURE_LIMITS_K[0]:g} "
                             f"<= low < high <= {TEMPERATURE_LIMITS_K[1]:g}", file=file,
                             field="core.temperature_K", value=T_raw)
    elif isinstance(T, str):
        if T != "liquidus":
            raise InputError("temperature_K is a value [K] or \"liquidus\"", file=file,
                             field="core.temperature_K", value=T)
    else:
        T = _num(T, file=file, field="core.temperature_K")
        if not TEMPERATURE_LIMITS_K[0] <= T <= TEMPERATURE_LIMITS_K[1]:
            raise InputError(f"temperature_K must lie in [{TEMPERATURE_LIMITS_K[0]:g}, "
                             f"{TEMPERATURE_LIMITS_K[1]:g}]", file=file,
                             field="core.temperature_K", value=T)
    return model, P, T


def _check_keys(section: str, table: dict, file: str) -> None:
    allowed = _ALLOWED.get(section)
    if allowed is None:
        return
    for key in table:
        if key not in allowed:
            where = f"[{section}] " if section else ""
            raise InputError(f"unknown key {where}'{key}'; allowed keys: {sorted(allowed)}",
                             file=file, field=f"{section}.{key}" if section else key)


def _num(value: Any, *, file: str, field: str, positive: bool = False,
         nonneg: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError("must be a number", file=file, field=field, value=value)
    v = float(value)
    if not math.isfinite(v) or (positive and v <= 0) or (nonneg and v < 0):
        kind = "positive" if positive else "non-negative" if nonneg else "finite"
        raise InputError(f"must be a {kind} number", file=file, field=field, value=value)
    return v


def read_target(path: str | Path, *, reference_element: str = "Mg",
                default_uncertainty_pct: float | None = None) -> tuple[pd.Series, pd.Series,
                                                                       tuple[str, ...]]:
    """Read a target composition table (elements or oxides) into mass fractions.

    Returns composition, 1-sigma uncertainty (mass fractions) and the elements whose
    uncertainty was defaulted.
    """
    file = str(path)
    df = read_csv_checked(path, ["element", "value", "unit"], what="target composition")
    parsed = check_composition_frame(df, file=file, allow_oxides=True)
    comp, unc = parsed.composition, parsed.uncertainty.copy()
    if reference_element not in comp.index:
        raise InputError(f"the reference element {reference_element} is missing from the "
                         "target table; add it or choose another [target] reference_element",
                         file=file, field="element", value=reference_element)
    if comp[reference_element] <= 0:
        raise InputError("the reference element must have a positive concentration",
                         file=file, field="value", value=float(comp[reference_element]))
    missing = unc.index[unc.isna() | (unc <= 0)]
    if len(missing) and default_uncertainty_pct is None:
        first = list(comp.index).index(missing[0]) + 2
        raise InputError("no uncertainty given; add an 'uncertainty' or 'uncertainty_pct' "
                         "column or set [target] default_uncertainty_pct", file=file,
                         row=first, field="uncertainty", value=missing[0])
    if len(missing):
        unc[missing] = comp[missing] * default_uncertainty_pct / 100.0
    return comp, unc, tuple(missing)


def _check_user_component(c: components.Component, file: str, field: str) -> None:
    """A user's component may not take a library name, and its isotope header lines
    must be finite values with a positive 1-sigma."""
    if c.name in components.available():
        raise InputError(f"the component file is named {c.name!r} like the library "
                         f"component {c.name}; give it another name with a '# name: ...' "
                         "header line (or use the library's by its name)", file=c.path,
                         field="name", value=c.name)
    for q, (v, sig) in c.isotopes.items():
        if not PLAUSIBLE["isotope_value"].contains(v):
            lim = PLAUSIBLE["isotope_value"]
            raise InputError(f"the anomaly lies outside {lim.describe()}: {lim.reason}",
                             file=c.path, field=q, value=v)
        if not PLAUSIBLE["isotope_sigma"].contains(sig):
            lim = PLAUSIBLE["isotope_sigma"]
            raise InputError(f"the 1-sigma lies outside {lim.describe()}: {lim.reason}",
                             file=c.path, field=q, value=sig)


def _resolve_component(item: Any, base: Path, file: str, field: str) -> components.Component:
    if not isinstance(item, str) or not item or "\x00" in item:
        raise InputError("must be a library name or a CSV path", file=file, field=field,
                         value=item)
    if item in components.available():
        return components.load(item)
    p = Path(item)
    if p.suffix.lower() == ".csv" or "/" in item:
        p = p if p.is_absolute() else base / p
        try:
            found = p.exists()
        except OSError:
            found = False
        if not found:
            raise InputError("component file not found", file=file, field=field, value=item)
        if not p.is_file():
            raise InputError("is not a regular file (a folder, FIFO or device); give the path "
                             "of a component CSV", file=file, field=field, value=item)
        c = components.read_component(p)
        _check_user_component(c, file, field)
        return c
    raise InputError(f"unknown component; the library holds {components.available()} or "
                     "give the path of a component CSV", file=file, field=field, value=item)


def load_case(path: str | Path, *, staged: bool = False) -> Case:
    """Read and validate a case file.

    Parameters
    ----------
    path : str or Path
        The TOML case file. Relative paths inside it resolve against its folder.
    staged : bool
        Whether the caller honours ``[accretion] stages = 2`` (``planetmix fit`` and
        :func:`inversion.staged.fit_case` do); other callers refuse such a case rather
        than ignore its staged part.

    Returns
    -------
    Case

    Raises
    ------
    InputError
        For any problem, naming the file and the key.
    """
    path = Path(path)
    file = str(path)
    text = read_text_checked(path, what="case")
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise InputError(f"not valid TOML: {err}", file=file) from None
    except RecursionError:
        raise InputError("not valid TOML: nested too deeply", file=file) from None
    if not raw:
        raise InputError("case file is empty", file=file)
    base = path.parent
    _check_keys("", raw, file)
    for sec in _ALLOWED:
        if sec and sec in raw:
            if not isinstance(raw[sec], dict):
                raise InputError("must be a table (a [section])", file=file, field=sec)
            _check_keys(sec, raw[sec], file)
    for sec in ("isotopes", "priors"):
        if sec in raw and not isinstance(raw[sec], dict):
            raise InputError("must be a table (a [section])", file=file, field=sec,
                             value=raw[sec])
    _check_prior_types(raw.get("priors") or {}, file)
    for k, v in (raw.get("sampler") or {}).items():
        if not isinstance(v, str | int | float) or (isinstance(v, float)
                                                    and not math.isfinite(v)):
            raise InputError("a sampler setting is a number, a name or true/false", file=file,
                             field=f"sampler.{k}", value=v)
    if raw.get("sampler"):
        # checked here too, not only by `planetmix sample`: no command accepts a case
        # with a setting the sampler would refuse (the check imports no sampler)
        from .bayes.settings import check_sampler_settings

        check_sampler_settings(raw["sampler"], file=file)

    tgt = raw.get("target")
    if not tgt or "table" not in tgt:
        raise InputError("the case needs [target] table = 'file.csv'", file=file,
                         field="target.table")
    if not isinstance(tgt["table"], str) or not tgt["table"].strip() or "\x00" in tgt["table"]:
        raise InputError("give the path of the target CSV as text", file=file,
                         field="target.table", value=tgt["table"])
    ref = tgt.get("reference_element", "Mg")
    if not isinstance(ref, str) or components.parse_species(ref) is None:
        raise InputError("not an element symbol", file=file, field="target.reference_element",
                         value=ref)
    if ref not in reference_elements():
        raise InputError("the reference element must be a refractory or main-component "
                         f"lithophile, one of {reference_elements()}", file=file,
                         field="target.reference_element", value=ref)
    dflt = tgt.get("default_uncertainty_pct")
    if dflt is not None:
        dflt = _num(dflt, file=file, field="target.default_uncertainty_pct", positive=True)
        check_in_range(dflt, "default_uncertainty_pct", file=file,
                       field="target.default_uncertainty_pct")
    tpath = Path(tgt["table"])
    tpath = tpath if tpath.is_absolute() else base / tpath
    try:
        found = tpath.exists()
    except OSError:
        found = False
    if not found:
        raise InputError(f"target table not found at {tpath}; paths are relative to the case "
                         "file's folder", file=file, field="target.table", value=tgt["table"])
    if not tpath.is_file():
        raise InputError("is not a regular file (a folder, FIFO or device); give the path of "
                         "the target CSV", file=file, field="target.table", value=tgt["table"])
    comp, unc, defaulted = read_target(tpath, reference_element=ref,
                                       default_uncertainty_pct=dflt)
    planet_mass = tgt.get("planet_mass_kg")
    if planet_mass is not None:
        planet_mass = _num(planet_mass, file=file, field="target.planet_mass_kg", positive=True)
        check_in_range(planet_mass, "planet_mass_kg", file=file, field="target.planet_mass_kg")
    mantle_mass = tgt.get("mantle_mass_kg")
    if mantle_mass is not None:
        mantle_mass = _num(mantle_mass, file=file, field="target.mantle_mass_kg", positive=True)
        if planet_mass is not None and not mantle_mass < planet_mass:
            raise InputError("the mantle must be lighter than the planet (planet_mass_kg)",
                             file=file, field="target.mantle_mass_kg", value=mantle_mass)
    min_dex = _num(tgt.get("minimum_uncertainty_dex", 0.02), file=file,
                   field="target.minimum_uncertainty_dex", nonneg=True)
    check_in_range(min_dex, "minimum_uncertainty_dex", file=file,
                   field="target.minimum_uncertainty_dex")
    target = Target(comp, unc, str(tpath), ref, planet_mass, mantle_mass, defaulted)

    bb = raw.get("building_blocks", {})
    cands = bb.get("candidates")
    if not isinstance(cands, list) or not cands:
        raise InputError("give a non-empty list of building blocks", file=file,
                         field="building_blocks.candidates", value=cands)
    if len(set(map(str, cands))) != len(cands):
        raise InputError("a candidate is listed twice", file=file,
                         field="building_blocks.candidates", value=cands)
    candidates = tuple(_resolve_component(c, base, file, "building_blocks.candidates")
                       for c in cands)
    names = [c.name for c in candidates]
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        raise InputError(f"two candidates carry the name(s) {twice}; give each component "
                         "file its own '# name: ...'", file=file,
                         field="building_blocks.candidates", value=cands)
    mms = bb.get("max_mixture_size", min(3, len(candidates)))
    if isinstance(mms, bool) or not isinstance(mms, int) or mms < 1:
        raise InputError("must be a positive whole number", file=file,
                         field="building_blocks.max_mixture_size", value=mms)

    vol = raw.get("volatility", {})
    form = check_option("volatility form", vol.get("form", "kinked"), CASE_FORMS, file=file,
                        field="volatility.form")
    ctab = check_option("condensation table", vol.get("condensation_table", "lodders2003"),
                        CONDENSATION_TABLES, file=file, field="volatility.condensation_table")
    excl_raw = (raw.get("elements") or {}).get("exclude", [])
    _check_tc_complete(comp, ctab, excl_raw if isinstance(excl_raw, list) else [], file)
    normaliser = None
    if tgt.get("normaliser", "CI") != "CI":
        normaliser = _resolve_component(tgt["normaliser"], base, file, "target.normaliser")
        if ref not in normaliser.composition.index or not normaliser.composition[ref] > 0:
            raise InputError(f"the normaliser has no {ref}, the reference element", file=file,
                             field="target.normaliser", value=tgt["normaliser"])

    core_raw = raw.get("core", {})
    feo = core_raw.get("mantle_FeO_wt")
    diw = core_raw.get("dIW")
    if feo is not None and diw is not None:
        raise InputError("give either mantle_FeO_wt or dIW, not both", file=file, field="core")
    if feo is not None:
        feo = _num(feo, file=file, field="core.mantle_FeO_wt", positive=True)
        check_in_range(feo, "mantle_FeO_wt", file=file, field="core.mantle_FeO_wt")
    if isinstance(diw, list):
        # [low, high]: inferred with the single-stage regressions (checked below)
        if len(diw) != 2:
            raise InputError("give dIW as one value or [low, high]", file=file,
                             field="core.dIW", value=diw)
        diw = tuple(check_in_range(_num(v, file=file, field="core.dIW"), "dIW", file=file,
                                   field="core.dIW") for v in diw)
        if not diw[0] < diw[1]:
            raise InputError("dIW = [low, high] needs low < high", file=file,
                             field="core.dIW", value=list(diw))
    elif diw is not None:
        diw = _num(diw, file=file, field="core.dIW")
        check_in_range(diw, "dIW", file=file, field="core.dIW")
    D = {}
    d_raw = core_raw.get("D", {})
    if not isinstance(d_raw, dict):
        raise InputError("give a table of element = D, e.g. D = {Ni = 25}", file=file,
                         field="core.D", value=d_raw)
    from .model import default_partition

    partitioned = sorted(default_partition()["D"].index)
    for el, val in d_raw.items():
        if components.parse_species(el) is None or components.parse_species(el)[2]:
            raise InputError("unknown element", file=file, field=f"core.D.{el}", value=el)
        if el not in partitioned:
            raise InputError(f"the model partitions only {partitioned} into the core (iron "
                             "by the iron split); remove this entry", file=file,
                             field=f"core.D.{el}", value=el)
        D[el] = _num(val, file=file, field=f"core.D.{el}", nonneg=True)
        check_in_range(D[el], "core_D", file=file, field=f"core.D.{el}")
    # the HSE: one effective D (constant) or a table of published values; an explicit
    # [core] D entry wins (docs/partitioning.md, "Highly siderophile elements")
    from .partitioning import hse_D, hse_sets

    hse = check_option("HSE partitioning", core_raw.get("hse_partitioning", "constant"),
                       hse_sets(), file=file, field="core.hse_partitioning")
    for el, val in hse_D(hse).items():
        D.setdefault(el, val)
    if feo is None and diw is None and "Fe" in comp.index:
        # the observed mantle iron sets the split; recorded as such
        from components import oxide_to_element_factor

        feo = float(comp["Fe"] / oxide_to_element_factor("Fe", 1, 1) * 100.0)
    if feo is None and diw is None:
        raise InputError("the iron split is unknown: give [core] mantle_FeO_wt or dIW, or Fe "
                         "in the target table", file=file, field="core")
    from .partitioning import ACTIVITY_MODELS

    activity = check_option("metal activity model", core_raw.get("metal_activity", "ideal"),
                            ACTIVITY_MODELS, file=file, field="core.metal_activity")
    core = CoreSettings(feo, diw, D, *_core_conditions(core_raw, D, file),
                        hse_partitioning=hse, metal_activity=activity)
    if activity != "ideal" and core.partitioning == "effective":
        raise InputError("metal_activity applies to the regressions; it needs partitioning = "
                         "\"single-stage\" or \"continuous\"", file=file,
                         field="core.metal_activity", value=activity)
    if core.partitioning == "continuous":
        core = _replace(core, continuous=_continuous(core_raw, diw, file))
    if isinstance(diw, tuple) and core.partitioning != "single-stage":
        raise InputError("dIW = [low, high] is inferred with partitioning = \"single-stage\" "
                         "only; give one value", file=file, field="core.dIW", value=list(diw))

    la = raw.get("late_accretion", {})
    la_name = la.get("component", "CI")
    late = None if la_name == "none" else _resolve_component(la_name, base, file,
                                                             "late_accretion.component")
    la_max = _num(la.get("max_fraction", 0.05), file=file, field="late_accretion.max_fraction",
                  positive=True)
    check_in_range(la_max, "late_max_fraction", file=file, field="late_accretion.max_fraction")

    acc = _accretion(raw.get("accretion") or {}, file)
    if acc.stages == 2 and core.partitioning != "effective":
        raise InputError("the two-stage fit uses the effective D; set partitioning = "
                         "\"effective\" or stages = 1", file=file, field="core.partitioning",
                         value=core.partitioning)
    if acc.stages == 2 and not staged:
        raise InputError("two-stage accretion is run by 'planetmix fit' only (the other "
                         "commands model one mixture throughout); remove [accretion] or "
                         "set stages = 1 here", file=file, field="accretion.stages",
                         value=2)
    iso = {}
    staged_iso = {}
    for name, pair in (raw.get("isotopes") or {}).items():
        if name in STAGED_ISOTOPE_CARRIERS and acc.stages == 1:
            raise InputError(f"{name} is carried by a siderophile element "
                             f"({STAGED_ISOTOPE_CARRIERS[name]}) whose mantle inventory "
                             "records the late stages of accretion, which one mixture "
                             "throughout cannot model; set [accretion] stages = 2 (with "
                             "late_stage_fraction) or remove it", file=file,
                             field=f"isotopes.{name}", value=name)
        if name not in STAGED_ISOTOPE_CARRIERS:
            check_option("isotope anomaly", name, ISOTOPE_CARRIERS, file=file,
                         field=f"isotopes.{name}")
        if (not isinstance(pair, list) or len(pair) != 2
                or not all(isinstance(x, int | float) and not isinstance(x, bool)
                           for x in pair)):
            raise InputError("give [value, 1-sigma]", file=file, field=f"isotopes.{name}",
                             value=pair)
        if pair[1] <= 0:
            raise InputError("the 1-sigma must be positive", file=file,
                             field=f"isotopes.{name}", value=pair)
        for key, x in (("isotope_value", pair[0]), ("isotope_sigma", pair[1])):
            lim = PLAUSIBLE[key]
            if not lim.contains(float(x)):
                raise InputError(f"outside {lim.describe()}: {lim.reason}", file=file,
                                 field=f"isotopes.{name}", value=pair)
        (staged_iso if name in STAGED_ISOTOPE_CARRIERS else iso)[name] = (
            float(pair[0]), float(pair[1]))
    if staged_iso:
        from dataclasses import replace

        acc = replace(acc, isotopes=staged_iso)
    need = 2 * (len(candidates) - 1) + 1
    if acc.stages == 2 and len(iso) + len(staged_iso) < need:
        raise InputError(f"two stages of {len(candidates)} building blocks need at least "
                         f"{need} isotope systems in [isotopes] (the case gives "
                         f"{len(iso) + len(staged_iso)}); add systems (e.g. e64Ni, e92Mo, "
                         "e100Ru) or fewer candidates", file=file, field="accretion.stages",
                         value=2)

    excl = (raw.get("elements") or {}).get("exclude", [])
    if not isinstance(excl, list):
        raise InputError("give a list of element symbols", file=file, field="elements.exclude",
                         value=excl)
    for el in excl:
        if not isinstance(el, str) or el not in components.elements().index:
            raise InputError("unknown element", file=file, field="elements.exclude", value=el)

    fit = raw.get("fit", {})
    window = _num(fit.get("isotope_window_sigma", 2.0), file=file,
                  field="fit.isotope_window_sigma", positive=True)
    check_in_range(window, "isotope_window_sigma", file=file, field="fit.isotope_window_sigma")
    # [fit] cmf_range is a constraint of the convex fit and the screen (the core mass
    # fraction of every answer lies in it); absent = no constraint beyond physics
    cmf_range = fit.get("cmf_range")
    if cmf_range is not None and (
            not isinstance(cmf_range, list) or len(cmf_range) != 2
            or not all(isinstance(v, int | float) and not isinstance(v, bool)
                       for v in cmf_range)
            or not 0 <= cmf_range[0] < cmf_range[1] < 1):
        raise InputError("give [low, high] with 0 <= low < high < 1", file=file,
                         field="fit.cmf_range", value=cmf_range)
    title = raw.get("title", path.stem)
    if not isinstance(title, str):
        raise InputError("must be text", file=file, field="title", value=title)
    return Case(
        title=title, path=file, target=target, candidates=candidates,
        max_mixture_size=int(min(mms, len(candidates))), volatility_form=form,
        condensation_table=ctab, core=core, late_component=late, late_max_fraction=la_max,
        isotopes=iso, exclude=tuple(excl), priors=dict(raw.get("priors") or {}),
        sampler=dict(raw.get("sampler") or {}), isotope_window_sigma=window,
        minimum_uncertainty_dex=min_dex,
        cmf_range=(None if cmf_range is None
                   else (float(cmf_range[0]), float(cmf_range[1]))),
        normaliser=normaliser, accretion=acc,
    )


def _accretion(table: dict[str, Any], file: str) -> AccretionSettings:
    """``[accretion]``: ``stages`` 1 or 2; ``late_stage_fraction`` in (0, 1), required
    with two stages and refused with one; ``core_mass_fraction`` in (0, 1), optional."""
    stages = table.get("stages", 1)
    if isinstance(stages, bool) or stages not in (1, 2):
        raise InputError("give 1 (one mixture throughout) or 2 (early and late mixtures)",
                         file=file, field="accretion.stages", value=stages)
    out = {}
    for key in ("late_stage_fraction", "core_mass_fraction"):
        if key not in table:
            continue
        if stages == 1:
            raise InputError("only used with [accretion] stages = 2; remove it or set "
                             "stages = 2", file=file, field=f"accretion.{key}",
                             value=table[key])
        v = _num(table[key], file=file, field=f"accretion.{key}")
        if not 0.0 < v < 1.0:
            raise InputError("give a mass fraction strictly between 0 and 1", file=file,
                             field=f"accretion.{key}", value=table[key])
        out[key] = v
    if stages == 2 and "late_stage_fraction" not in out:
        raise InputError("two stages need the mass fraction of the late stage, e.g. "
                         "late_stage_fraction = 0.2", file=file,
                         field="accretion.late_stage_fraction")
    return AccretionSettings(stages=int(stages), **out)


def _check_tc_complete(comp: pd.Series, table: str, exclude: list, file: str) -> None:
    """Refuse a condensation table that lacks a Tc for a target element the fit would use."""
    from .model import MODEL_EXCLUDED

    props = components.elements()
    col = CONDENSATION_TABLES[table]
    lacking = [e for e in comp.index if e not in MODEL_EXCLUDED and e not in exclude
               and comp[e] > 0 and (e not in props.index or not math.isfinite(
                   float(props.loc[e, col])))]
    if lacking:
        held = int(props[col].notna().sum())
        fix = ("use lodders2003 or add them to [elements] exclude" if table != "lodders2003"
               else "no table offered has one: add them to [elements] exclude")
        raise InputError(f"the condensation table {table} ({held} elements) has no 50% "
                         f"condensation temperature for {lacking}; {fix}", file=file,
                         field="volatility.condensation_table", value=table)


def _check_prior_types(priors: dict, file: str) -> None:
    """Shape of the ``[priors]`` tables: each a table with a ``dist`` name and numbers
    (or, for the weights, a list of numbers); the values are checked by
    :func:`inversion.bayes.check_priors` against the compiled problem."""
    for name, spec in priors.items():
        fld = f"priors.{name}"
        if not isinstance(spec, dict) or "dist" not in spec:
            raise InputError('give a table such as {dist = "Uniform", lower = 0, upper = 1}',
                             file=file, field=fld, value=spec)
        for k, v in spec.items():
            if k == "dist":
                if not isinstance(v, str):
                    raise InputError("the distribution is a name such as \"Normal\"",
                                     file=file, field=f"{fld}.dist", value=v)
                continue
            vals = v if isinstance(v, list) else [v]
            if not vals or not all(isinstance(x, int | float) and not isinstance(x, bool)
                                   and math.isfinite(x) for x in vals):
                raise InputError("must be a finite number (or a list of them for the "
                                 "weights)", file=file, field=f"{fld}.{k}", value=v)
