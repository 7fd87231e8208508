"""Metal/silicate partitioning at pressure, temperature and oxygen fugacity, and the core
split it implies (docs/partitioning.md; docs/model.md section 4).

Every numerical function takes arrays and an array namespace ``xp`` (``numpy`` by default,
``jax.numpy`` for gradients) and uses only operations both provide: no in-place
assignment, no Python branching on array values (``xp.where``), loops over a fixed number
of steps only. Batch axes lead, the element axis is last.

Conventions
-----------
- ``P`` in GPa, ``T`` in K.
- ``dIW = 2 log10(x_FeO / x_Fe)``: mole fraction of FeO in the silicate (single-cation
  oxide basis) over that of Fe in the metal, ideal mixing. dIW < 0 is more reduced than
  the iron-wustite buffer. It is the same definition as :mod:`inversion.model` uses.
- Molar partition coefficient ``D_i = x_i(metal) / x_iO(n/2)(silicate)``, silicate on the
  single-cation oxide basis (MgO, SiO2, AlO1.5, NiO, WO2 ... one cation per unit).
- Exchange equilibrium ``iO(n/2) (sil) + (n/2) Fe (met) = i (met) + (n/2) FeO (sil)``,
  ``K_D = D_i / D_Fe^(n/2)``, ``log10 K_D = a + b/T + c P/T``, hence
  ``log10 D_i = a + b/T + c P/T - (n/4) dIW`` (plus, for fits of activities, the
  epsilon-model term ``- log10 gamma_i + (n/2) log10 gamma_Fe``).
- Mass D (the ratio of mass fractions) from molar D:
  ``D_mass = D_mol * Mbar_sil / Mbar_met`` with ``Mbar_sil`` the mean molar mass of the
  silicate per oxide unit and ``Mbar_met`` that of the metal per atom.

The core split is a fixed point ``s = G(s)`` of the state
``s = [k, Mbar_sil, Mbar_met, x_Si, x_S]`` (core-to-mantle mass ratio, the two mean
molar masses, Si and S mole fractions of the metal): :func:`split_step` is G,
:func:`solve_single_stage` the numpy solver (damped iteration to a tolerance),
:func:`single_stage_unrolled` a fixed number of steps for any ``xp``.

Examples
--------
>>> import numpy as np
>>> round(float(peridotite_liquidus(np.array(29.0))), 1)  # Fiquet et al. (2010) fit
2794.1
>>> round(float(molar_to_mass(np.array(10.0), 50.0, 55.0)), 4)
9.0909
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

import components

from .exceptions import InputError

__all__ = [
    "DEFAULT_CHOICE", "FORMS", "ACTIVITY_MODELS", "CoreChemistry", "load_regressions",
    "load_interactions", "compile_chemistry", "log10_exchange", "log10_D_molar",
    "mass_D", "molar_to_mass", "mass_to_molar", "ln_gamma", "oxygen_in_metal",
    "peridotite_liquidus", "cmb_pressure", "initial_state", "split_step", "split_outputs",
    "solve_single_stage", "single_stage_unrolled", "split_step_feo", "solve_for_mantle_FeO",
    "continuous_accretion", "STATE_FIELDS", "HSE", "HSE_CONSTANT", "hse_sets",
    "load_hse_table", "hse_D", "choice_provenance",
]

DATA = components.DATA_DIR / "partitioning"
#: Regression forms of metal_silicate_regressions.csv.
FORMS = ("exchange", "oxygen", "mass_constant")
#: Activity models of the metal: ideal (gamma = 1) or the interaction-parameter model.
ACTIVITY_MODELS = ("ideal", "epsilon")
#: The row used for each element unless the caller chooses another source.
DEFAULT_CHOICE: dict[str, str] = {
    "Ni": "fischer2015", "Co": "fischer2015", "V": "fischer2015", "Cr": "fischer2015",
    "Si": "fischer2015", "O": "fischer2015", "Nb": "mann2009", "Ta": "mann2009",
    "W": "cottrell2009", "S": "mcdonough2003;mcdonoughsun1995",
}
#: Names of the state components, in order.
STATE_FIELDS = ("k", "Mbar_sil", "Mbar_met", "x_Si", "x_S")
#: Reference temperature of the interaction parameters [K].
T0_INTERACTION = 1873.0
M_O = 15.999
_LN10 = float(np.log(10.0))
_PROVENANCE = ("publication", "typed_copy", "recalled")
#: The highly siderophile elements.
HSE = ("Ru", "Rh", "Pd", "Re", "Os", "Ir", "Pt", "Au")
#: Name of the HSE choice that keeps the one effective D of earth_core_mantle.csv.
HSE_CONSTANT = "constant"


def _read(path: Path, required: list[str], what: str) -> pd.DataFrame:
    try:
        df = pd.read_csv(path, comment="#")
    except (OSError, pd.errors.ParserError) as err:
        raise InputError(f"cannot read the {what} table: {err}", file=str(path)) from err
    missing = [c for c in required if c not in df.columns]
    if missing:
        raise InputError(f"the {what} table lacks column(s) {missing}", file=str(path),
                         field=missing[0])
    known = components.sources().index
    for i, row in df.iterrows():
        for key in str(row["source"]).split(";"):
            if key.strip() not in known:
                raise InputError("source key not in the sources table; add it to "
                                 "components/data/sources", file=str(path), row=int(i) + 2,
                                 field="source", value=row["source"])
        if row["provenance"] not in _PROVENANCE:
            raise InputError(f"provenance must be one of {_PROVENANCE}", file=str(path),
                             row=int(i) + 2, field="provenance", value=row["provenance"])
    return df


def load_regressions(path: str | Path | None = None) -> pd.DataFrame:
    """The partitioning regressions (one row per element and source), checked.

    Parameters
    ----------
    path : str or Path, optional
        A table of the format of ``components/data/partitioning/
        metal_silicate_regressions.csv`` (the default).
    """
    path = Path(path) if path is not None else DATA / "metal_silicate_regressions.csv"
    cols = ["element", "form", "a", "b", "c", "valence", "activity", "source", "provenance"]
    df = _read(path, cols, "partitioning regression")
    for i, row in df.iterrows():
        if row["form"] not in FORMS:
            raise InputError(f"form must be one of {FORMS}", file=str(path), row=int(i) + 2,
                             field="form", value=row["form"])
        if row["activity"] not in ACTIVITY_MODELS:
            raise InputError(f"activity must be one of {ACTIVITY_MODELS}", file=str(path),
                             row=int(i) + 2, field="activity", value=row["activity"])
        for f in ("a", "b", "c", "valence"):
            if not np.isfinite(float(row[f])):
                raise InputError("coefficient is not a finite number", file=str(path),
                                 row=int(i) + 2, field=f, value=row[f])
    dup = df.duplicated(["element", "source"])
    if dup.any():
        i = int(np.flatnonzero(dup)[0])
        raise InputError("element and source appear twice", file=str(path), row=i + 2,
                         field="source", value=df["source"].iloc[i])
    return df


def load_hse_table(path: str | Path | None = None) -> pd.DataFrame:
    """The HSE metal/silicate D at stated conditions (``hse_high_pressure.csv``), checked.

    Parameters
    ----------
    path : str or Path, optional
        A table of that format (the default is the bundled one).

    Returns
    -------
    DataFrame
        Columns ``set, element, D, P_GPa, T_K, source, provenance, ...``; mass-basis D.
    """
    path = Path(path) if path is not None else DATA / "hse_high_pressure.csv"
    df = _read(path, ["set", "element", "D", "P_GPa", "T_K", "source", "provenance"],
               "HSE partitioning")
    for i, row in df.iterrows():
        if row["element"] not in HSE:
            raise InputError(f"element must be one of {HSE}", file=str(path),
                             row=int(i) + 2, field="element", value=row["element"])
        if not (np.isfinite(float(row["D"])) and float(row["D"]) > 0):
            raise InputError("D must be a positive number", file=str(path), row=int(i) + 2,
                             field="D", value=row["D"])
        if row["set"] == HSE_CONSTANT:
            raise InputError(f"the set name {HSE_CONSTANT!r} is reserved", file=str(path),
                             row=int(i) + 2, field="set", value=row["set"])
    dup = df.duplicated(["set", "element"])
    if dup.any():
        i = int(np.flatnonzero(dup)[0])
        raise InputError("set and element appear twice", file=str(path), row=i + 2,
                         field="element", value=df["element"].iloc[i])
    return df


def hse_sets(path: str | Path | None = None) -> tuple[str, ...]:
    """Names accepted by ``[core] hse_partitioning``: ``"constant"`` and the table's sets."""
    return (HSE_CONSTANT, *sorted(set(load_hse_table(path)["set"])))


def hse_D(name: str, path: str | Path | None = None) -> dict[str, float]:
    """Mass-basis D of the HSE for the choice ``name`` (empty for ``"constant"``).

    Raises
    ------
    InputError
        For a name that is neither ``"constant"`` nor a set of the table.
    """
    if name == HSE_CONSTANT:
        return {}
    df = load_hse_table(path)
    if name not in set(df["set"]):
        raise InputError(f"unknown HSE partitioning; use one of {hse_sets(path)}",
                         field="core.hse_partitioning", value=name)
    rows = df[df["set"] == name]
    return {str(e): float(d) for e, d in zip(rows["element"], rows["D"], strict=True)}


def choice_provenance(hse_partitioning: str = HSE_CONSTANT, metal_activity: str = "ideal"
                      ) -> dict[str, Any]:
    """What the ``[core] hse_partitioning`` and ``metal_activity`` choices stand for, with
    their sources (the ``core_conditions`` block and the provenance of fit.json and
    sample.json).

    Examples
    --------
    >>> choice_provenance()["metal_activity"]["model"]
    'ideal'
    """
    if hse_partitioning == HSE_CONSTANT:
        part = pd.read_csv(DATA / "earth_core_mantle.csv", comment="#").set_index("element")
        rows = part.loc[[e for e in HSE if e in part.index]]
        hse = {"choice": HSE_CONSTANT,
               "description": "one effective D of earth_core_mantle.csv for every HSE",
               "D": {str(e): float(d) for e, d in rows["D"].items()},
               "sources": sorted(set(rows["source"].astype(str))),
               "table": "components/data/partitioning/earth_core_mantle.csv"}
    else:
        table = load_hse_table()
        rows = table[table["set"] == hse_partitioning]
        hse = {"choice": hse_partitioning,
               "description": "mass-basis D at stated conditions (not following P, T, dIW)",
               "D": hse_D(hse_partitioning),
               "sources": sorted(set(rows["source"].astype(str))),
               "provenance": sorted(set(rows["provenance"].astype(str))),
               "table": "components/data/partitioning/hse_high_pressure.csv"}
    if metal_activity not in ACTIVITY_MODELS:
        raise InputError(f"activity model must be one of {ACTIVITY_MODELS}",
                         field="core.metal_activity", value=metal_activity)
    act: dict[str, Any] = {"model": metal_activity}
    if metal_activity == "ideal":
        act["description"] = "every regression evaluated with mole fractions (gamma = 1)"
        act["sources"] = []
    else:
        inter = load_interactions()
        reg = load_regressions()
        act["description"] = ("interaction-parameter model of liquid iron (1873 K, scaled "
                              "T0/T) on the regression rows fitted with activities")
        act["applies_to"] = sorted({f"{e} ({s})" for e, s, a in zip(
            reg["element"], reg["source"], reg["activity"], strict=True) if a == "epsilon"})
        act["sources"] = sorted(set(inter["source"].astype(str)))
        act["provenance"] = sorted(set(inter["provenance"].astype(str)))
        act["table"] = "components/data/partitioning/interaction_parameters.csv"
    return {"hse_partitioning": hse, "metal_activity": act}


def load_interactions(path: str | Path | None = None) -> pd.DataFrame:
    """Interaction parameters of solutes in liquid iron at 1873 K (``i, j, value``)."""
    path = Path(path) if path is not None else DATA / "interaction_parameters.csv"
    return _read(path, ["i", "j", "value", "source", "provenance"], "interaction parameter")


@dataclass(frozen=True)
class CoreChemistry:
    """Per-element arrays of the partitioning model on one element axis (length n).

    Attributes
    ----------
    elements : element symbols.
    atomic_weight : (n,) g/mol.
    oxide_factor : (n,) mantle oxide mass per element mass (the mantle's oxides).
    kind : (n,) int: 0 fixed mass D (``D_fixed``), 1 exchange regression, 2 constant mass
        D of the table, 3 iron (set by dIW).
    a, b, c : (n,) regression coefficients (b in K, c in K/GPa); for kind 2, a = log10 D.
    valence : (n,) cation valence n_i of the exchange reaction.
    use_gamma : (n,) 1.0 where the epsilon term applies (activity model ``epsilon`` and a
        fit of activities), else 0.0.
    D_fixed : (n,) mass D of the elements without a regression (0 for lithophiles).
    ln_gamma0 : (n,) ln gamma0 at 1873 K; eps : (n, 2) eps_i^j for j = (Si, S).
    eps_light : (2, 2) eps among (Si, S).
    oxygen : (a, b, c) of the FeO dissolution fit, or None (no O in the core).
    oxygen_gamma : 1.0 where the O fit gets the solvent's activity term (epsilon).
    fe, si, s : indices of Fe, Si, S (-1 where absent).
    sources : (element, source key) of each regression used.
    activity : the activity model.
    """

    elements: tuple[str, ...]
    atomic_weight: np.ndarray
    oxide_factor: np.ndarray
    kind: np.ndarray
    a: np.ndarray
    b: np.ndarray
    c: np.ndarray
    valence: np.ndarray
    use_gamma: np.ndarray
    D_fixed: np.ndarray
    ln_gamma0: np.ndarray
    eps: np.ndarray
    eps_light: np.ndarray
    oxygen: tuple[float, float, float] | None
    oxygen_gamma: float
    fe: int
    si: int
    s: int
    sources: tuple[tuple[str, str], ...]
    activity: str

    def one_hot(self, index: int) -> np.ndarray:
        """(n,) indicator of one element (all zero for index -1)."""
        v = np.zeros(len(self.elements))
        if index >= 0:
            v[index] = 1.0
        return v


def compile_chemistry(elements: list[str] | tuple[str, ...], *,
                      D_fixed: Mapping[str, float] | None = None,
                      choice: Mapping[str, str] | None = None,
                      activity: str = "ideal", oxygen: bool = True,
                      regressions: pd.DataFrame | None = None,
                      interactions: pd.DataFrame | None = None) -> CoreChemistry:
    """Compile the partitioning model for an element axis.

    Parameters
    ----------
    elements : element symbols (must include Fe).
    D_fixed : mass D of elements without a chosen regression (e.g. the effective D of
        :func:`inversion.model.default_partition` for the highly siderophile elements);
        elements in neither are lithophile (D = 0).
    choice : element -> source key, overriding :data:`DEFAULT_CHOICE`; a value of
        ``"none"`` drops the regression of that element (it then uses ``D_fixed``).
    activity : ``"ideal"`` or ``"epsilon"``: with ``epsilon`` the rows whose ``activity``
        column says ``epsilon`` get the interaction-parameter term.
    oxygen : dissolve O in the metal by the FeO dissolution fit (default True).

    Raises
    ------
    InputError
        Unknown activity model, missing Fe, or a chosen source without a row.
    """
    if activity not in ACTIVITY_MODELS:
        raise InputError(f"activity model must be one of {ACTIVITY_MODELS}",
                         field="activity", value=activity)
    els = tuple(elements)
    if "Fe" not in els:
        raise InputError("the element axis has no Fe", field="elements")
    reg = load_regressions() if regressions is None else regressions
    inter = load_interactions() if interactions is None else interactions
    pick = dict(DEFAULT_CHOICE)
    pick.update(dict(choice or {}))
    props = components.elements()
    n = len(els)
    kind = np.zeros(n, dtype=int)
    a, b, c, val, use_g = (np.zeros(n) for _ in range(5))
    Dfix = np.array([float((D_fixed or {}).get(e, 0.0)) for e in els])
    used = []
    ox = None
    ox_gamma = 0.0
    for e, src in pick.items():
        if src == "none":
            continue
        rows = reg[(reg["element"] == e) & (reg["source"] == src)]
        if rows.empty:
            raise InputError(f"no {e} regression from source {src}; choose one of "
                             f"{sorted(reg.loc[reg['element'] == e, 'source'])}",
                             field=f"partitioning.{e}", value=src)
        r = rows.iloc[0]
        if r["form"] == "oxygen":
            if oxygen:
                ox = (float(r["a"]), float(r["b"]), float(r["c"]))
                ox_gamma = 1.0 if (activity == "epsilon" and r["activity"] == "epsilon") else 0.0
                used.append((e, src))
            continue
        if e not in els:
            continue
        j = els.index(e)
        kind[j] = 1 if r["form"] == "exchange" else 2
        a[j], b[j], c[j], val[j] = (float(r[f]) for f in ("a", "b", "c", "valence"))
        use_g[j] = 1.0 if (activity == "epsilon" and r["activity"] == "epsilon") else 0.0
        used.append((e, src))
    fe = els.index("Fe")
    kind[fe] = 3
    light = ("Si", "S")
    lng0 = np.zeros(n)
    eps = np.zeros((n, 2))
    eps_light = np.zeros((2, 2))
    for _, r in inter.iterrows():
        i_el, j_el, v = str(r["i"]), str(r["j"]), float(r["value"])
        if j_el == "gamma0":
            if i_el in els:
                lng0[els.index(i_el)] = v
            continue
        if i_el in els and j_el in light:
            eps[els.index(i_el), light.index(j_el)] = v
        if j_el in els and i_el in light:
            eps[els.index(j_el), light.index(i_el)] = v
        if i_el in light and j_el in light:
            eps_light[light.index(i_el), light.index(j_el)] = v
            eps_light[light.index(j_el), light.index(i_el)] = v
    return CoreChemistry(
        elements=els, atomic_weight=props.loc[list(els), "atomic_weight"].to_numpy(float),
        oxide_factor=props.loc[list(els), "oxide_factor"].to_numpy(float), kind=kind,
        a=a, b=b, c=c, valence=val, use_gamma=use_g, D_fixed=Dfix, ln_gamma0=lng0,
        eps=eps, eps_light=eps_light, oxygen=ox, oxygen_gamma=ox_gamma, fe=fe,
        si=els.index("Si") if "Si" in els else -1, s=els.index("S") if "S" in els else -1,
        sources=tuple(used), activity=activity)


# ---------------------------------------------------------------- partitioning physics

def log10_exchange(a: Any, b: Any, c: Any, P: Any, T: Any, xp: Any = np) -> Any:
    """log10 of an exchange coefficient, ``a + b/T + c P/T`` (T in K, P in GPa).

    Examples
    --------
    >>> round(float(log10_exchange(1.06, 1553.0, -98.0, 40.0, 3000.0)), 4)
    0.271
    """
    return a + (b + c * P) / T


def ln_gamma(x_light: Any, T: Any, chem: CoreChemistry, xp: Any = np) -> tuple[Any, Any]:
    """Activity coefficients of the metal by the interaction-parameter model.

    Parameters
    ----------
    x_light : array (..., 2)
        Mole fractions of (Si, S) in the metal.
    T : array (...)
        Temperature [K].

    Returns
    -------
    ln_g : array (..., n)
        ``(T0/T) (ln gamma0_i + sum_j eps_i^j x_j)`` for each element i.
    ln_g_fe : array (...)
        ``-(T0/T) (1/2) sum_jk eps_j^k x_j x_k``, the solvent's term consistent with the
        solutes' to first order (Gibbs-Duhem).
    """
    scale = (T0_INTERACTION / T)[..., None]
    ln_g = scale * (chem.ln_gamma0 + x_light @ chem.eps.T)
    quad = xp.sum((x_light @ chem.eps_light) * x_light, axis=-1)
    ln_g_fe = -0.5 * scale[..., 0] * quad
    return ln_g, ln_g_fe


def log10_D_molar(chem: CoreChemistry, P: Any, T: Any, dIW: Any, x_light: Any,
                  xp: Any = np) -> Any:
    """Molar metal/silicate D of every element, shape (..., n).

    ``log10 D = a + b/T + c P/T - (n/4) dIW - u (log10 gamma_i - (n/2) log10 gamma_Fe)``
    for exchange rows (u = 1 where the epsilon term applies), ``-dIW/2`` for iron; other
    rows return 0 (their mass D is not molar; see :func:`mass_D`).
    """
    P = xp.asarray(P)[..., None]
    T_ = xp.asarray(T)
    dIW = xp.asarray(dIW)[..., None]
    ln_g, ln_g_fe = ln_gamma(x_light, T_, chem, xp)
    act = (ln_g - 0.5 * chem.valence * ln_g_fe[..., None]) / _LN10
    logK = log10_exchange(chem.a, chem.b, chem.c, P, T_[..., None], xp)
    logD = logK - 0.25 * chem.valence * dIW - chem.use_gamma * act
    is_ex = chem.kind == 1
    is_fe = chem.kind == 3
    return xp.where(is_ex, logD, xp.where(is_fe, -0.5 * dIW, 0.0 * logD))


def molar_to_mass(D_mol: Any, Mbar_sil: Any, Mbar_met: Any) -> Any:
    """Mass D from molar D: ``D_mol * Mbar_sil / Mbar_met``.

    c_met = x_met M_i / Mbar_met and c_sil = x_sil M_i / Mbar_sil (single-cation oxide
    basis), so the element's own molar mass cancels.
    """
    return D_mol * Mbar_sil / Mbar_met


def mass_to_molar(D_mass: Any, Mbar_sil: Any, Mbar_met: Any) -> Any:
    """Molar D from mass D (inverse of :func:`molar_to_mass`)."""
    return D_mass * Mbar_met / Mbar_sil


def mass_D(chem: CoreChemistry, P: Any, T: Any, dIW: Any, state: Any, xp: Any = np) -> Any:
    """Mass-basis D of every element (..., n) at the state's metal composition."""
    Mbar_sil, Mbar_met = state[..., 1:2], state[..., 2:3]
    logD = log10_D_molar(chem, P, T, dIW, state[..., 3:5], xp)
    molar = molar_to_mass(10.0 ** logD, Mbar_sil, Mbar_met)
    const = 10.0 ** (chem.a * (chem.kind == 2))
    return xp.where((chem.kind == 1) | (chem.kind == 3), molar,
                    xp.where(chem.kind == 2, const, chem.D_fixed + 0.0 * molar))


def oxygen_in_metal(chem: CoreChemistry, P: Any, T: Any, dIW: Any, x_light: Any = None,
                    xp: Any = np) -> Any:
    """Mole fraction of O in the metal, ``x_O = K_O 10^(dIW/2)``, capped at 0.5.

    ``K_O = x_Fe x_O / x_FeO`` (FeO (sil) = Fe (met) + O (met)); with
    ``x_FeO / x_Fe = 10^(dIW/2)``. With the epsilon activity model, divided by gamma_Fe
    of the metal of composition ``x_light`` (..., 2) (gamma_O = 1: no O parameters).
    Zero when the chemistry has no oxygen fit.
    """
    if chem.oxygen is None:
        return 0.0 * xp.asarray(dIW)
    a, b, c = chem.oxygen
    log_x = log10_exchange(a, b, c, P, T, xp) + 0.5 * xp.asarray(dIW)
    if x_light is not None:
        _, ln_g_fe = ln_gamma(x_light, xp.asarray(T), chem, xp)
        log_x = log_x - chem.oxygen_gamma * ln_g_fe / _LN10
    return xp.minimum(10.0 ** log_x, 0.5)


def peridotite_liquidus(P: Any, xp: Any = np) -> Any:
    """Peridotite liquidus [K] at P [GPa]: ``1940 (P/29 + 1)^(1/1.9)``.

    Fiquet et al. (2010, Science 329, 1516), a Simon-Glatzel fit to 140 GPa (recalled;
    the same form stands in a public typed copy, see the source key ``fiquet2010``).
    """
    return 1940.0 * (xp.asarray(P) / 29.0 + 1.0) ** (1.0 / 1.9)


def cmb_pressure(mass_fraction: Any, P_final: float, xp: Any = np) -> Any:
    """Core-mantle-boundary pressure of a body grown to ``mass_fraction`` of its final
    mass: ``P_final * f^(2/3)``.

    A body of fixed mean density has R proportional to M^(1/3) and internal pressures
    proportional to G M^2 / R^4, i.e. to M^(2/3) (the uniform sphere's centre pressure
    3 G M^2 / (8 pi R^4)).
    """
    return P_final * xp.asarray(mass_fraction) ** (2.0 / 3.0)


# ---------------------------------------------------------------- the core split

def initial_state(a: Any, xp: Any = np) -> Any:
    """Start of the iteration for bulk ``a`` (..., n): k = 0.5, Mbar_sil = 50 g/mol,
    Mbar_met = 55 g/mol, no Si or S in the metal (shape (..., 5))."""
    one = xp.ones(xp.asarray(a).shape[:-1])
    return xp.stack([0.5 * one, 50.0 * one, 55.0 * one, 0.0 * one, 0.0 * one], axis=-1)


def _balance(state: Any, a: Any, P: Any, T: Any, dIW: Any, chem: CoreChemistry,
             xp: Any) -> dict[str, Any]:
    D = mass_D(chem, P, T, dIW, state, xp)
    k = state[..., 0:1]
    m = a / (1.0 + D * k)
    core = a - m
    aw = chem.atomic_weight
    M_s = xp.sum(m * chem.oxide_factor, axis=-1)
    n_sil = xp.sum(m / aw, axis=-1)
    n_met0 = xp.sum(core / aw, axis=-1)
    x_O = oxygen_in_metal(chem, P, T, dIW, state[..., 3:5], xp)
    n_O = x_O / (1.0 - x_O) * n_met0
    M_c = xp.sum(core, axis=-1) + n_O * M_O
    n_met = n_met0 + n_O
    si = xp.sum(core * chem.one_hot(chem.si), axis=-1) / aw[max(chem.si, 0)]
    s = xp.sum(core * chem.one_hot(chem.s), axis=-1) / aw[max(chem.s, 0)]
    return {"D": D, "mantle": m, "core": core, "M_s": M_s, "M_c": M_c, "n_sil": n_sil,
            "n_met": n_met, "n_O": n_O, "x_O": x_O, "x_Si": si / n_met, "x_S": s / n_met}


def split_step(state: Any, a: Any, P: Any, T: Any, dIW: Any, chem: CoreChemistry,
               xp: Any = np) -> Any:
    """One step G of the core fixed point.

    Parameters
    ----------
    state : array (..., 5)
        ``[k, Mbar_sil, Mbar_met, x_Si, x_S]`` (:data:`STATE_FIELDS`).
    a : array (..., n)
        Bulk element masses per unit mass of the reference element (as
        :func:`inversion.model._core_split`).
    P, T, dIW : arrays (...)
        Equilibration pressure [GPa], temperature [K] and dIW.

    Returns
    -------
    array (..., 5)
        The state implied by the mass balance ``m_i = a_i / (1 + D_i k)`` at the
        partition coefficients of ``state``: ``k = M_c / M_s`` (mantle as oxides, core as
        metal with dissolved O), the new mean molar masses and metal Si, S fractions.
    """
    r = _balance(state, a, P, T, dIW, chem, xp)
    return xp.stack([r["M_c"] / r["M_s"], r["M_s"] / r["n_sil"], r["M_c"] / r["n_met"],
                     r["x_Si"], r["x_S"]], axis=-1)


def split_outputs(state: Any, a: Any, P: Any, T: Any, dIW: Any, chem: CoreChemistry,
                  xp: Any = np) -> dict[str, Any]:
    """Mantle, core and their properties at a (converged) state.

    Returns
    -------
    dict
        ``mantle``, ``core`` (..., n) element masses per unit R; ``core_O`` (...) mass of
        dissolved O per unit R; ``M_s`` (mantle as oxides), ``M_c`` (metal with O),
        ``cmf``; ``core_wt`` (..., n) and ``core_O_wt`` mass fractions of the core;
        ``D`` (..., n) mass D; ``x_O``, ``x_Si``, ``x_S`` metal mole fractions;
        ``mantle_FeO_wt`` (...) FeO mass fraction of the mantle; ``state``.
    """
    r = _balance(state, a, P, T, dIW, chem, xp)
    M_c, M_s = r["M_c"], r["M_s"]
    fe = chem.one_hot(chem.fe)
    feo = xp.sum(r["mantle"] * fe, axis=-1) * chem.oxide_factor[chem.fe] / M_s
    return {"mantle": r["mantle"], "core": r["core"], "core_O": r["n_O"] * M_O,
            "M_s": M_s, "M_c": M_c, "cmf": M_c / (M_c + M_s),
            "core_wt": r["core"] / M_c[..., None], "core_O_wt": r["n_O"] * M_O / M_c,
            "D": r["D"], "x_O": r["x_O"], "x_Si": r["x_Si"], "x_S": r["x_S"],
            "mantle_FeO_wt": feo, "state": state}


def _relax(state: Any, new: Any, damping: float) -> Any:
    # damped step in log space for the positive parts (k, molar masses), linear for the
    # mole fractions: keeps every component in its domain
    pos = np.array([1.0, 1.0, 1.0, 0.0, 0.0])
    log_s = np.log(np.maximum(state, 1e-300))
    log_n = np.log(np.maximum(new, 1e-300))
    lin = state + damping * (new - state)
    return pos * np.exp(log_s + damping * (log_n - log_s)) + (1.0 - pos) * lin


def _damped_iteration(step: Any, relax: Any, s: np.ndarray, tol: float, max_iter: int
                      ) -> tuple[np.ndarray, int, np.ndarray]:
    """Iterate ``s <- relax(s, step(s))`` until every row's largest relative change is
    at most ``tol`` (or ``max_iter``); returns the state, the count and the per-row flag."""
    iterations = 0
    done = np.zeros(s.shape[:-1], dtype=bool)
    while iterations < max_iter:
        iterations += 1
        new = step(s)
        change = np.max(np.abs(new - s) / (np.abs(s) + 1e-12), axis=-1)
        s = relax(s, new)
        done = change <= tol
        if np.all(done):
            break
    return s, iterations, done


def solve_single_stage(a: np.ndarray, P: Any, T: Any, dIW: Any, chem: CoreChemistry, *,
                       tol: float = 1e-13, max_iter: int = 2000, damping: float = 0.7,
                       state0: np.ndarray | None = None) -> dict[str, Any]:
    """Single-stage equilibrium core split by damped iteration of :func:`split_step`
    (numpy).

    Parameters
    ----------
    a : (..., n) bulk element masses per unit mass of R.
    P, T, dIW : scalars or arrays broadcastable to the batch shape.
    tol : stop when every state component changes by less than ``tol`` relative.
    damping : step fraction of the damped iteration (1 = plain fixed-point iteration).
    state0 : start (default :func:`initial_state`).

    Returns
    -------
    dict
        :func:`split_outputs` plus ``iterations`` and ``converged`` (bool array).
    """
    a = np.asarray(a, float)
    batch = a.shape[:-1]
    P = np.broadcast_to(np.asarray(P, float), batch)
    T = np.broadcast_to(np.asarray(T, float), batch)
    dIW = np.broadcast_to(np.asarray(dIW, float), batch)
    s = initial_state(a) if state0 is None else np.asarray(state0, float)
    s, iterations, done = _damped_iteration(
        lambda s: split_step(s, a, P, T, dIW, chem),
        lambda s, new: _relax(s, new, damping), s, tol, max_iter)
    out = split_outputs(s, a, P, T, dIW, chem)
    out["iterations"] = iterations
    out["converged"] = done
    return out


def split_step_feo(state: Any, a: Any, P: Any, T: Any, feo: Any, chem: CoreChemistry,
                   xp: Any = np) -> Any:
    """Step of the split with the mantle's FeO fixed and dIW an unknown.

    Parameters
    ----------
    state : array (..., 6)
        The five components of :func:`split_step` and dIW.
    feo : array (...)
        Target FeO mass fraction of the mantle (kg/kg).

    Returns
    -------
    array (..., 6)
        :func:`split_step` at the state's dIW, and ``dIW + 2 log10(feo / FeO(state))``:
        the mantle's FeO goes nearly as 10^(dIW/2), so the fixed point (FeO = feo) is
        reached by the same damped iteration.
    """
    dIW = state[..., 5]
    r = _balance(state[..., :5], a, P, T, dIW, chem, xp)
    fe = chem.one_hot(chem.fe)
    now = xp.sum(r["mantle"] * fe, axis=-1) * chem.oxide_factor[chem.fe] / r["M_s"]
    return xp.stack([r["M_c"] / r["M_s"], r["M_s"] / r["n_sil"], r["M_c"] / r["n_met"],
                     r["x_Si"], r["x_S"], dIW + 2.0 * xp.log10(feo / now)], axis=-1)


def solve_for_mantle_FeO(a: np.ndarray, P: Any, T: Any, feo: Any, chem: CoreChemistry, *,
                         dIW0: float = -2.0, tol: float = 1e-12, max_iter: int = 4000,
                         damping: float = 0.5) -> dict[str, Any]:
    """Single-stage split at (P, T) with the mantle's FeO mass fraction fixed; dIW is
    solved for (numpy). Returns :func:`split_outputs` plus ``dIW``, ``iterations`` and
    ``converged``."""
    a = np.asarray(a, float)
    batch = a.shape[:-1]
    P = np.broadcast_to(np.asarray(P, float), batch)
    T = np.broadcast_to(np.asarray(T, float), batch)
    feo = np.broadcast_to(np.asarray(feo, float), batch)
    s = np.concatenate([initial_state(a), np.full(batch + (1,), float(dIW0))], axis=-1)
    s, iterations, done = _damped_iteration(
        lambda s: split_step_feo(s, a, P, T, feo, chem),
        lambda s, new: np.concatenate([_relax(s[..., :5], new[..., :5], damping),
                                       s[..., 5:] + damping * (new[..., 5:] - s[..., 5:])],
                                      axis=-1), s, tol, max_iter)
    out = split_outputs(s[..., :5], a, P, T, s[..., 5], chem)
    out.update(dIW=s[..., 5], iterations=iterations, converged=done)
    return out


def single_stage_unrolled(a: Any, P: Any, T: Any, dIW: Any, chem: CoreChemistry, *,
                          n_steps: int = 200, damping: float = 0.7, xp: Any = np,
                          state0: Any = None) -> dict[str, Any]:
    """The same split by a fixed number of damped steps, for any ``xp`` (differentiable
    under ``jax.numpy``; the lead's implicit-function wrapper can replace it)."""
    a = xp.asarray(a)
    batch = a.shape[:-1]
    P = xp.broadcast_to(xp.asarray(P), batch)
    T = xp.broadcast_to(xp.asarray(T), batch)
    dIW = xp.broadcast_to(xp.asarray(dIW), batch)
    s = initial_state(a, xp) if state0 is None else state0
    pos = xp.asarray([1.0, 1.0, 1.0, 0.0, 0.0])
    for _ in range(n_steps):
        new = split_step(s, a, P, T, dIW, chem, xp)
        log_s = xp.log(xp.maximum(s, 1e-300))
        log_n = xp.log(xp.maximum(new, 1e-300))
        s = pos * xp.exp(log_s + damping * (log_n - log_s)) + (1.0 - pos) * (
            s + damping * (new - s))
    return split_outputs(s, a, P, T, dIW, chem, xp)


def continuous_accretion(a: Any, chem: CoreChemistry, *, n_steps: int = 10,
                         P_cmb_final: float, depth_fraction: Any = 0.5,
                         dIW_start: Any = -2.0, dIW_end: Any | None = None,
                         T_offset: Any = 0.0, xp: Any = np, inner_steps: int = 200,
                         damping: float = 0.7) -> dict[str, Any]:
    """Continuous accretion in ``n_steps`` equal increments of bulk composition ``a``.

    At step j (j = 1..N) the body has mass fraction f = j/N; the increment ``a/N`` joins
    the mantle left by the earlier steps, and the whole equilibrates at
    ``P_j = depth_fraction * cmb_pressure(f, P_cmb_final)``, ``T_j`` = the peridotite
    liquidus at P_j plus ``T_offset``, and ``dIW_j`` linear from ``dIW_start`` (first
    step) to ``dIW_end`` (last; default constant). The metal formed joins the core
    without further exchange.

    Returns
    -------
    dict
        ``mantle``, ``core`` (..., n), ``core_O``, ``M_s``, ``M_c``, ``cmf``, ``core_wt``,
        ``core_O_wt``, ``mantle_FeO_wt`` and per step ``P``, ``T``, ``dIW`` (lists).
    """
    a = xp.asarray(a)
    dIW_end = dIW_start if dIW_end is None else dIW_end
    mantle = 0.0 * a
    core = 0.0 * a
    core_O = 0.0 * a[..., 0]
    Ps, Ts, ds = [], [], []
    state = None
    for j in range(1, n_steps + 1):
        f = j / n_steps
        P = depth_fraction * cmb_pressure(f, P_cmb_final, xp)
        T = peridotite_liquidus(P, xp) + T_offset
        w = 0.0 if n_steps == 1 else (j - 1) / (n_steps - 1)
        dIW = dIW_start + (dIW_end - dIW_start) * w
        system = mantle + a / n_steps
        out = single_stage_unrolled(system, P, T, dIW, chem, n_steps=inner_steps,
                                    damping=damping, xp=xp, state0=state)
        state = out["state"]
        mantle = out["mantle"]
        core = core + out["core"]
        core_O = core_O + out["core_O"]
        Ps.append(P)
        Ts.append(T)
        ds.append(dIW)
    M_s = xp.sum(mantle * chem.oxide_factor, axis=-1)
    M_c = xp.sum(core, axis=-1) + core_O
    fe = chem.one_hot(chem.fe)
    return {"mantle": mantle, "core": core, "core_O": core_O, "M_s": M_s, "M_c": M_c,
            "cmf": M_c / (M_c + M_s), "core_wt": core / M_c[..., None],
            "core_O_wt": core_O / M_c,
            "mantle_FeO_wt": xp.sum(mantle * fe, axis=-1) * chem.oxide_factor[chem.fe] / M_s,
            "P": Ps, "T": Ts, "dIW": ds}
