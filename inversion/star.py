"""From a host star's photospheric abundances to a rocky planet (docs/model.md sections 7, 10).

Vectorised over Monte Carlo draws (and over stars: the batch stacks every star's draws
into one array).

Notes
-----
For element X with stellar abundance [X/H] (dex) on the solar reference A_sun(X)
(A(H) = 12), the number ratio is ``n_X / n_H = 10**(A_sun(X) + [X/H] - 12)`` and the mass
ratio to Mg is

    q_X = 10**(A_sun(X) + [X/H]_X - A_sun(Mg) - [Mg/H]) * M_X / M_Mg

with atomic weights M from :mod:`periodictable`. A devolatilisation pattern (a volatility
form of :mod:`inversion.volatility` and its parameters) removes volatiles:
``a_X = q_X * 10**(log10 r_X - log10 r_Mg)``. Core formation follows the engine's mass
balance (:func:`inversion.model._core_split`, effective D of
:func:`inversion.model.default_partition`, iron split by the mantle FeO or by dIW), and
:func:`inversion.planet.assemble` builds mantle oxides, core, bulk and molar ratios.

- Elements the star's table lacks take ``[X/H] = [Fe/H]`` of the same draw (the solar
  X/Fe ratio; ``[X/H] = 0`` when Fe is missing too) and are flagged ``solar_ratio``.
- Elements without a photospheric value in the solar table (e.g. U in Asplund et al.
  2021) take a reference on the photospheric scale from CI chondrites:
  ``A_ref(X) = A_sun(Mg) + log10((C_X / M_X) / (C_Mg / M_Mg))_CI`` (Lodders 2003), flagged
  ``ci_reference``.
- Only the stellar [X/H] uncertainties are propagated; the solar reference and the
  devolatilisation pattern are held fixed (the analysis is differential to the Sun).
- No late accretion is added (it changes no major element measurably).

Caution: condensation temperatures depend on the composition of the disk (C/O, Mg/Si),
so a pattern borrowed from the Earth (or from any other body) is an assumption for
another system.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

import components
from components._tables import parse_decimal
from components.units import PLAUSIBLE

from . import kernel
from .case import CONDENSATION_TABLES, Case, CoreSettings, Target
from .exceptions import InputError
from .handoff import PlanetDraws, planet_draws
from .model import Problem, _core_split, default_partition
from .options import check_option
from .planet import assemble
from .volatility import CASE_FORMS, get_form, log10_retained

__all__ = ["STAR_ELEMENTS", "CAUTION", "EARTH_PATTERN_LABEL", "EARTH_MANTLE_FEO_WT",
           "EARTH_EXCLUDE", "Pattern", "StarSettings", "StarInput", "StarModel",
           "earth_calibrated_pattern", "read_pattern", "problem_for_bulk", "read_star_table",
           "check_star_values", "star_seed", "star_model", "draw_xh", "planets_from_xh",
           "run_star", "core_split_fast", "xh_from_normals"]

#: Elements carried from the star to the planet: the rock-forming and core-forming
#: elements, and the heat producers (U, Th, K).
STAR_ELEMENTS: tuple[str, ...] = ("Na", "Mg", "Al", "Si", "P", "S", "K", "Ca", "Ti", "V", "Cr",
                                  "Mn", "Fe", "Co", "Ni", "Th", "U")
#: Caution printed with every star-to-planet result.
CAUTION = ("Caution: condensation temperatures depend on the disk's composition (C/O, Mg/Si); "
           "a devolatilisation pattern borrowed from the Earth or another body is an "
           "assumption for this system.")
EARTH_PATTERN_LABEL = "Earth-calibrated (BSE_MS95 vs CI)"
#: Earth-like mantle FeO [wt%]: bulk silicate Earth of McDonough & Sun (1995), 8.05 wt%.
EARTH_MANTLE_FEO_WT = 8.0
#: Elements with anomalous behaviour in the Earth's mantle (volatile chalcophiles,
#: halogens), left out of the Earth calibration (common practice).
EARTH_EXCLUDE = ("S", "Se", "Te", "Pb", "In", "Cl", "Br", "I", "Tl", "Hg", "Cd", "B")
#: Relative 1-sigma given to BSE values without an uncertainty in the calibration.
_DEFAULT_REL_UNC = 0.15
_LN10 = math.log(10.0)


# --------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class Pattern:
    """A devolatilisation pattern: a volatility form, its parameters and where it came
    from."""

    form: str
    params: tuple[float, ...]
    condensation_table: str
    label: str
    origin: dict[str, Any] = field(default_factory=dict, compare=False)

    def as_dict(self) -> dict[str, Any]:
        """JSON view: label, form, named parameters, condensation table, origin."""
        return {"label": self.label, "form": self.form,
                "parameters": dict(zip(get_form(self.form).params, self.params, strict=True)),
                "condensation_table": self.condensation_table, "origin": self.origin}


@dataclass(frozen=True)
class StarSettings:
    """Settings of a star-to-planet run (recorded in every result)."""

    pattern: Pattern
    solar: str = "asplund2021"
    mantle_FeO_wt: float | None = EARTH_MANTLE_FEO_WT
    dIW: float | None = None
    planet_mass_kg: float | None = None
    draws: int = 1000
    seed: int = 0

    def as_dict(self) -> dict[str, Any]:
        """JSON view of the settings."""
        return {"pattern": self.pattern.as_dict(), "solar_reference": self.solar,
                "mantle_FeO_wt": self.mantle_FeO_wt, "dIW": self.dIW,
                "planet_mass_kg": self.planet_mass_kg, "draws": self.draws, "seed": self.seed,
                "elements": list(STAR_ELEMENTS)}


@dataclass(frozen=True)
class StarInput:
    """One star's abundances: [X/H] and 1-sigma (dex) by element symbol."""

    star_id: str
    values: dict[str, float]
    errors: dict[str, float]
    unused: tuple[str, ...] = ()


# --------------------------------------------------------------------------- pattern
@lru_cache(maxsize=8)
def earth_calibrated_pattern(form: str = "kinked",
                             condensation_table: str = "lodders2003") -> Pattern:
    """The Earth-calibrated devolatilisation pattern, derived by the engine.

    Fits the library's bulk silicate Earth (McDonough & Sun 1995, ``BSE_MS95``) with CI
    chondrite (Lodders 2003) as the only building block, a CI late veneer and the given
    volatility form, leaving out :data:`EARTH_EXCLUDE`; BSE values without an uncertainty
    get 15 %. Cached per process.
    """
    from .fit import fit_problem
    from .model import compile_problem

    check_option("volatility form", form, CASE_FORMS)
    check_option("condensation table", condensation_table, CONDENSATION_TABLES)
    bse = components.load("BSE_MS95")
    ci = components.load("CI")
    unc = bse.uncertainty.copy()
    missing = unc.index[unc.isna() | (unc <= 0)]
    unc[missing] = bse.composition[missing] * _DEFAULT_REL_UNC
    feo = float(bse.composition["Fe"] / components.oxide_to_element_factor("Fe", 1, 1) * 100)
    case = Case(
        title=EARTH_PATTERN_LABEL, path=bse.path,
        target=Target(bse.composition, unc, bse.path, "Mg", None, None, tuple(missing)),
        candidates=(ci,), max_mixture_size=1, volatility_form=form,
        condensation_table=condensation_table, core=CoreSettings(feo, None, {}),
        late_component=ci, late_max_fraction=0.05, isotopes={}, exclude=EARTH_EXCLUDE)
    res = fit_problem(compile_problem(case))
    if not res.feasible:  # pragma: no cover - the library's BSE always fits
        raise components.PlanetmixError("the Earth calibration failed: " + "; ".join(
            res.reasons))
    params = tuple(float(res.volatility[k]) for k in get_form(form).params)
    return Pattern(form, params, condensation_table, EARTH_PATTERN_LABEL,
                   {"target": "BSE_MS95", "building_block": "CI", "late_component": "CI",
                    "excluded": list(EARTH_EXCLUDE), "chi2": res.chi2,
                    "n_elements": res.n_elements,
                    "late_accretion_fraction": res.late_accretion_fraction,
                    "core_mass_fraction": res.core_mass_fraction})


def read_pattern(path: str | Path) -> Pattern:
    """Read a devolatilisation pattern from a ``fit.json`` or ``sample.json`` result.

    The file needs ``volatility`` (fit.json) or ``posterior.volatility`` (sample.json)
    with ``form`` and each parameter of the form, either a number or an object holding
    ``median`` (or ``mean``): the posterior median is used, its spread is not propagated.
    The condensation table is read from ``provenance.condensation_table``,
    ``condensation_table`` or the condensation table among
    ``provenance.reference_tables`` (default lodders2003).
    """
    from components._tables import read_text_checked

    file = str(path)
    p = Path(path)
    if not p.exists():
        raise InputError("pattern file not found", file=file, field="--pattern")
    text = read_text_checked(p, what="pattern")
    try:
        data = json.loads(text)
    except json.JSONDecodeError as err:
        raise InputError(f"not valid JSON: {err}", file=file) from None
    except RecursionError:
        raise InputError("not valid JSON: nested too deeply", file=file) from None
    vol = None
    if isinstance(data, dict):
        vol = data.get("volatility")
        post = data.get("posterior")
        if vol is None and isinstance(post, dict):  # sample.json: posterior summaries
            vol = post.get("volatility")
    if not isinstance(vol, dict) or "form" not in vol:
        raise InputError("no 'volatility' object with a 'form'; give a fit.json or "
                         "sample.json result", file=file, field="volatility")
    form = check_option("volatility form", vol["form"], CASE_FORMS, file=file,
                        field="volatility.form")
    params = []
    for name in get_form(form).params:
        v = vol.get(name)
        if isinstance(v, dict):
            v = v.get("median", v.get("mean"))
        if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
            raise InputError(f"parameter {name} of the {form} form is missing or not a "
                             "number", file=file, field=f"volatility.{name}", value=v)
        params.append(float(v))
    prov = data.get("provenance", {}) if isinstance(data.get("provenance"), dict) else {}
    refs = prov.get("reference_tables", [])
    listed = [t for t in (refs if isinstance(refs, list) else [])
              if isinstance(t, str) and t in CONDENSATION_TABLES]
    table = prov.get("condensation_table", data.get(
        "condensation_table", listed[0] if listed else "lodders2003"))
    table = check_option("condensation table", table, CONDENSATION_TABLES, file=file,
                         field="condensation_table")
    return Pattern(form, tuple(params), table, f"from {p.name}",
                   {"file": str(p.resolve()), "title": data.get("title")})


# --------------------------------------------------------------------------- problem
def problem_for_bulk(elements: tuple[str, ...] | list[str], *, mantle_FeO_wt: float | None,
                     dIW: float | None, condensation_table: str = "lodders2003") -> Problem:
    """A :class:`~inversion.model.Problem` for core formation and assembly of a given bulk.

    Only the fields used by :func:`inversion.model._core_split` and
    :func:`inversion.planet.assemble` carry information (element properties, effective D
    of :func:`inversion.model.default_partition`, iron split); there are no building
    blocks, no observations and no late component.
    """
    if (mantle_FeO_wt is None) == (dIW is None):
        raise InputError("give either the mantle FeO or dIW", field="--mantle-FeO-wt/--dIW")
    props = components.elements()
    els = list(elements)
    if "Fe" not in els or "Mg" not in els:
        raise InputError("the element set needs Fe and Mg", field="elements", value=els)
    tc_col = CONDENSATION_TABLES[condensation_table]
    tc = props.loc[els, tc_col].to_numpy(float)
    if not np.isfinite(tc).all():
        miss = [e for e, t in zip(els, tc, strict=True) if not np.isfinite(t)]
        raise InputError(f"the condensation table {condensation_table} has no value for "
                         f"{miss}; use lodders2003", field="condensation_table")
    part = default_partition()
    D = np.array([float(part["D"].get(e, 0.0)) for e in els])
    fe = els.index("Fe")
    D[fe] = 0.0
    n = len(els)
    mantle_Fe = None
    if mantle_FeO_wt is not None:
        mantle_Fe = mantle_FeO_wt / 100.0 * components.oxide_to_element_factor("Fe", 1, 1)
    cations = np.array([components.parse_species(props.loc[e, "oxide"])[1] for e in els])
    nan = np.full(n, np.nan)
    return Problem(
        elements=tuple(els), components=(), Q=np.zeros((0, n)), imputed=np.zeros((0, n), bool),
        q_late=np.zeros(n), late_name=None, c_late_R=1.0, c_comp_R=np.zeros(0),
        q_ci=nan, tc=tc, D=D,
        D_spread=np.array([float(part["log10_spread"].get(e, 0.0)) for e in els]),
        oxide_factor=props.loc[els, "oxide_factor"].to_numpy(float),
        atomic_weight=props.loc[els, "atomic_weight"].to_numpy(float), cations=cations,
        reference="Mg", ref_index=els.index("Mg"), fe_index=fe, mantle_Fe=mantle_Fe, dIW=dIW,
        fit_index=np.zeros(0, int), y=np.zeros(0), sigma=np.zeros(0), y_all=nan,
        sigma_all=nan, observed=nan, volatility_form="kinked",
        condensation_table=condensation_table, late_max_fraction=0.0, isotopes=(),
        isotope_window_sigma=2.0)


def core_split_fast(a: np.ndarray, p: Problem, D: np.ndarray) -> dict[str, np.ndarray]:
    """The engine's core mass balance (:func:`inversion.kernel.solve_core`; with the mantle
    FeO fixed, Newton's method on k, :func:`inversion.kernel.solve_feo_element_major`)."""
    if p.mantle_Fe is None:
        return _core_split(a, p, D)
    r = _core_split_t(np.ascontiguousarray(a.T), p, D)
    m = np.ascontiguousarray(r["mantle"].T)
    core = np.ascontiguousarray(r["core"].T)
    return {"mantle": m, "core": core, "M_s": r["M_s"], "M_c": r["M_c"], "k": r["k"],
            "D_Fe": np.full(a.shape[0], np.nan)}


def _core_split_t(at: np.ndarray, p: Problem, D: np.ndarray) -> dict[str, np.ndarray]:
    """:func:`core_split_fast` on the element-major layout: ``at`` (n, B), results (n, B)
    and (B,)."""
    k, mt, core, M_s = kernel.solve_feo_element_major(kernel.static_of(p), at,
                                                       np.asarray(D, float)[:, None])
    return {"mantle": mt, "core": core, "M_s": M_s, "M_c": core.sum(axis=0), "k": k}


# --------------------------------------------------------------------------- star input
def _element_index() -> pd.Index:
    return components.elements().index


def check_star_values(star_id: str, values: dict[str, Any], errors: dict[str, Any], *,
                      file: str | None = None, row: int | None = None) -> StarInput:
    """Check one star's [X/H] values and 1-sigma (dex): numbers, finite, sigma >= 0.

    ``values`` and ``errors`` map element symbols to numbers or text (empty text or NaN
    value means the element is not measured). Raises :class:`InputError` naming the
    element and the problem.
    """
    known = _element_index()
    vals: dict[str, float] = {}
    errs: dict[str, float] = {}
    for el, raw in values.items():
        if el not in known or el == "H":
            raise InputError("not an element symbol the library knows", file=file, row=row,
                             field="element", value=el)
        if raw is None or (isinstance(raw, str) and raw.strip() == "") or (
                isinstance(raw, float) and math.isnan(raw)):
            continue
        try:
            v = parse_decimal(raw)
        except (TypeError, ValueError):
            raise InputError(f"[{el}/H] is not a number", file=file, row=row, field=el,
                             value=raw) from None
        if not math.isfinite(v):
            raise InputError(f"[{el}/H] is not finite", file=file, row=row, field=el, value=raw)
        lim = PLAUSIBLE["star_xh_dex"]
        if not lim.contains(v):
            raise InputError(f"[{el}/H] lies outside {lim.describe()}: {lim.reason}; check "
                             "the value (dex relative to the Sun, not an absolute abundance)",
                             file=file, row=row, field=el, value=raw)
        e_raw = errors.get(el)
        if e_raw is None or (isinstance(e_raw, str) and e_raw.strip() == "") or (
                isinstance(e_raw, float) and math.isnan(e_raw)):
            raise InputError(f"missing uncertainty for [{el}/H]", file=file, row=row,
                             field=f"{el}_err", value=e_raw)
        try:
            e = parse_decimal(e_raw)
        except (TypeError, ValueError):
            raise InputError(f"uncertainty of [{el}/H] is not a number", file=file, row=row,
                             field=f"{el}_err", value=e_raw) from None
        if not math.isfinite(e) or e < 0:
            raise InputError(f"uncertainty of [{el}/H] must be a non-negative number of dex",
                             file=file, row=row, field=f"{el}_err", value=e_raw)
        lim = PLAUSIBLE["star_sigma_dex"]
        if not lim.contains(e):
            raise InputError(f"uncertainty of [{el}/H] lies outside {lim.describe()}: "
                             f"{lim.reason}", file=file, row=row, field=f"{el}_err",
                             value=e_raw)
        vals[el] = v
        errs[el] = e
    unused = tuple(sorted(e for e in vals if e not in STAR_ELEMENTS))
    return StarInput(str(star_id), {e: v for e, v in vals.items() if e in STAR_ELEMENTS},
                     {e: v for e, v in errs.items() if e in STAR_ELEMENTS}, unused)


def read_star_table(path: str | Path, star_id: str | None = None) -> StarInput:
    """Read one star's abundances: columns ``element``, ``value`` ([X/H], dex) and
    ``uncertainty`` (1-sigma, dex); ``#`` comment lines allowed."""
    from components._tables import read_csv_checked

    file = str(path)
    df = read_csv_checked(path, ["element", "value", "uncertainty"], what="star abundance")
    if df.empty:
        raise InputError("the star table has no rows", file=file)
    seen: dict[str, int] = {}
    vals, errs = {}, {}
    for i, r in enumerate(df.itertuples(index=False)):
        el = str(r.element).strip()
        row = i + 2
        if el in seen:
            raise InputError(f"element listed twice (rows {seen[el]} and {row})", file=file,
                             row=row, field="element", value=el)
        seen[el] = row
        if str(r.value).strip() == "":
            raise InputError("empty value; remove the row or give [X/H]", file=file, row=row,
                             field="value", value=el)
        try:
            check_star_values("", {el: r.value}, {el: r.uncertainty}, file=file, row=row)
        except InputError as err:
            # restate with this file's column names
            fld = ("uncertainty" if str(err.field).endswith("_err") else
                   "element" if err.field == "element" else "value")
            raise InputError(err.reason, file=file, row=row, field=fld,
                             value=err.value) from None
        vals[el], errs[el] = r.value, r.uncertainty
    return check_star_values(star_id or Path(path).stem, vals, errs, file=file)


def star_seed(seed: int, star_id: str) -> np.random.SeedSequence:
    """Per-star seed: the run seed and a stable hash (SHA-256) of the star's id, so that
    every path (single star, batch in one process, batch on Dask) draws the same numbers."""
    h = hashlib.sha256(str(star_id).encode("utf-8")).digest()
    words = [int.from_bytes(h[i:i + 4], "little") for i in range(0, 16, 4)]
    return np.random.SeedSequence([int(seed), *words])


# --------------------------------------------------------------------------- model
@dataclass(frozen=True)
class StarModel:
    """Everything a star-to-planet evaluation needs, precomputed from the settings."""

    settings: StarSettings
    problem: Problem
    A_ref: np.ndarray
    ci_reference: tuple[str, ...]
    log_mass: np.ndarray
    logr: np.ndarray


@lru_cache(maxsize=16)
def star_model(settings: StarSettings) -> StarModel:
    """Precompute the reference abundances, atomic weights and the volatility factor."""
    els = STAR_ELEMENTS
    pat = settings.pattern
    p = problem_for_bulk(els, mantle_FeO_wt=settings.mantle_FeO_wt, dIW=settings.dIW,
                         condensation_table=pat.condensation_table)
    sun = components.solar(settings.solar)
    ci = components.load("CI").composition
    aw = p.atomic_weight
    mg = els.index("Mg")
    A = np.empty(len(els))
    ci_ref = []
    for j, e in enumerate(els):
        if e in sun.index and np.isfinite(sun.loc[e, "A"]):
            A[j] = float(sun.loc[e, "A"])
        else:
            A[j] = float(sun.loc["Mg", "A"]) + math.log10((ci[e] / aw[j]) / (ci["Mg"] / aw[mg]))
            ci_ref.append(e)
    logr = log10_retained(pat.form, np.array([pat.params]), p.tc)[0]
    logr = logr - logr[mg]
    return StarModel(settings, p, A, tuple(ci_ref), np.log10(aw), logr)


def draw_xh(star: StarInput, n_draws: int, rng: np.random.Generator) -> tuple[np.ndarray,
                                                                             tuple[str, ...]]:
    """Monte Carlo draws of [X/H] (n_draws, n) on :data:`STAR_ELEMENTS`.

    One standard-normal array (n_draws, n) is drawn for every star whatever it holds, so
    the draws of an element do not depend on which other elements are present. Missing
    elements follow the [Fe/H] draw (0 when Fe is missing too).
    """
    z = rng.standard_normal((n_draws, len(STAR_ELEMENTS)))
    xh, missing = xh_from_normals([star], z)
    return xh, missing[0]


def xh_from_normals(stars: list[StarInput], z: np.ndarray) -> tuple[np.ndarray,
                                                                    list[tuple[str, ...]]]:
    """[X/H] draws for several stars from their standard normals ``z`` (S * D, n), each
    star's D rows consecutive (see :func:`draw_xh`)."""
    S = len(stars)
    D = z.shape[0] // S
    fe = STAR_ELEMENTS.index("Fe")
    present = np.array([[e in st.values for e in STAR_ELEMENTS] for st in stars])
    v = np.array([[st.values.get(e, 0.0) for e in STAR_ELEMENTS] for st in stars])
    sd = np.array([[st.errors.get(e, 0.0) for e in STAR_ELEMENTS] for st in stars])
    xh = (v[:, None, :] + sd[:, None, :] * z.reshape(S, D, -1))
    fill = np.where(present[:, None, fe:fe + 1], xh[:, :, fe:fe + 1], 0.0)
    xh = np.where(present[:, None, :], xh, fill).reshape(S * D, -1)
    missing = [tuple(e for e, here in zip(STAR_ELEMENTS, row, strict=True) if not here)
               for row in present]
    return xh, missing


def planets_from_xh(xh: np.ndarray, model: StarModel) -> tuple[PlanetDraws, np.ndarray]:
    """Planets for a stack of [X/H] draws (B, n). Returns the draws and a (B,) mask of
    feasible draws (False where the mantle FeO needs more iron than the star provides)."""
    p = model.problem
    mg = p.ref_index
    # element-major (n, B) while computing: long inner loops
    xt = np.ascontiguousarray(xh.T)
    off = (model.A_ref - model.A_ref[mg] + model.log_mass - model.log_mass[mg] + model.logr)
    at = xt - xt[mg]
    at += off[:, None]
    at *= _LN10
    np.exp(at, out=at)
    if p.mantle_Fe is not None:
        split = _core_split_t(at, p, p.D)
        split = {**split, "mantle": np.ascontiguousarray(split["mantle"].T),
                 "core": np.ascontiguousarray(split["core"].T)}
        a = np.ascontiguousarray(at.T)
    else:
        a = np.ascontiguousarray(at.T)
        split = _core_split(a, p, p.D)
    B = a.shape[0]
    fwd = {"lam": np.zeros(B), "M_s": split["M_s"], "mantle": split["mantle"],
           "core": split["core"], "bulk": a, "cmf": split["M_c"] / (split["M_s"] + split["M_c"])}
    planet = assemble(p, fwd)
    ok = split["core"][:, p.fe_index] >= 0.0
    return planet_draws(p, planet, planet_mass_kg=model.settings.planet_mass_kg), ok


@dataclass(frozen=True)
class StarResult:
    """One star's planet draws with its flags (infeasible draws hold NaN)."""

    star: StarInput
    draws: PlanetDraws
    feasible: np.ndarray
    solar_ratio: tuple[str, ...]
    ci_reference: tuple[str, ...]

    @property
    def infeasible_fraction(self) -> float:
        """Fraction of draws whose mantle FeO needs more iron than the star provides."""
        return float(1.0 - self.feasible.mean())

    def flags(self) -> dict[str, Any]:
        """Flags for the output: missing elements, CI-based references, unused input."""
        return {"solar_ratio": list(self.solar_ratio),
                "solar_ratio_rule": "[X/H] = [Fe/H] of the same draw (solar X/Fe); 0 without Fe",
                "ci_reference": list(self.ci_reference),
                "ci_reference_rule": "A_ref(X) = A_sun(Mg) + log10 of the CI atom ratio X/Mg "
                                     "(Lodders 2003)",
                "not_used": list(self.star.unused),
                "infeasible_draw_fraction": self.infeasible_fraction}


def run_star(star: StarInput, settings: StarSettings) -> StarResult:
    """Star to planet with Monte Carlo over the abundance uncertainties.

    Parameters
    ----------
    star : StarInput
    settings : StarSettings
        ``draws`` Monte Carlo draws from the per-star seed :func:`star_seed`.

    Returns
    -------
    StarResult
    """
    model = star_model(settings)
    rng = np.random.default_rng(star_seed(settings.seed, star.star_id))
    xh, missing = draw_xh(star, settings.draws, rng)
    draws, ok = planets_from_xh(xh, model)
    return StarResult(star, draws.masked(ok), ok, missing, model.ci_reference)
