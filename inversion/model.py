"""The forward model (docs/model.md sections 2-7), vectorised over parameter sets.

A :class:`Problem` holds a case compiled to arrays on named element and component axes.
:func:`forward` maps parameters (reference-element weights of the building blocks,
volatility parameters, late-accretion fraction) to the normalised abundances of the
silicate body and everything needed to assemble the whole planet.

Notes
-----
Work per unit mass of the reference element R in the bulk planet. With R-basis weights
``w`` (on the simplex) and component ratios ``Q[k, i] = (C_i / C_R)_k``, the bulk after
volatile loss is ``a_i = (w @ Q)_i * r_i / r_R``. Core formation by mass balance with
effective metal/silicate partition coefficients ``D_i`` (mass basis) leaves
``m_i = a_i / (1 + D_i k)`` in the mantle, where ``k = M_c / M_s`` is the core-to-mantle
mass ratio. The iron split is set either by the mantle FeO (mantle Fe mass fraction F,
``m_Fe = F M_s``) or by the redox state ``dIW = 2 log10(x_FeO / x_Fe)`` with ideal mixing
on a formula-unit basis, which gives ``D_Fe = 10**(-dIW/2) * Mbar_sil / Mbar_met`` (mean
molar masses of silicate oxide units and of metal). ``M_s`` (mantle, as oxides) and
``M_c`` (metal) depend on k, so k is found by a short fixed-point iteration (unrolled, so
a gradient can pass through it). Late accretion adds a mass fraction ``lam`` of the final
mantle with the late component's ratios:
``v = lam C_LV,R / ((1 - lam) C_s,R + lam C_LV,R)`` and
``ratio_final = (1 - v) ratio_mantle + v ratio_LV``.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

import components

from . import kernel
from .case import CONDENSATION_TABLES, ISOTOPE_CARRIERS, Case
from .exceptions import InputError
from .volatility import get_form

__all__ = ["Problem", "compile_problem", "forward", "relative_log_retained",
           "default_partition", "CORE_ITERATIONS", "MODEL_EXCLUDED", "METAL_CLASSES",
           "implausible_values", "implausible_lines", "IMPLAUSIBLE_DEX"]

#: Maximum fixed-point iterations of the core split (:data:`inversion.kernel.CORE_ITERATIONS`).
CORE_ITERATIONS = kernel.CORE_ITERATIONS
#: Elements kept out of the mass balance: oxygen comes from stoichiometry; H, C, N and
#: the noble gases are not part of a rocky mantle's oxide budget.
MODEL_EXCLUDED = frozenset({"O", "H", "C", "N", "He", "Ne", "Ar", "Kr", "Xe"})
_LN10 = np.log(10.0)


def default_partition() -> pd.DataFrame:
    """Effective mass-basis D = c_core / c_mantle and log10 spread, indexed by element.

    Earth-calibrated: core of McDonough (2003) over mantle of McDonough & Sun (1995).
    """
    path = components.DATA_DIR / "partitioning" / "earth_core_mantle.csv"
    df = pd.read_csv(path, comment="#").set_index("element")
    df["D"] = df["D"].fillna(df["core_ppm"] / df["mantle_ppm"])
    return df


@dataclass(frozen=True)
class Problem:
    """A case compiled to arrays. Axes are named: ``elements`` and ``components``.

    Attributes (n elements in the mass balance, K building blocks)
    ----------
    elements : tuple of str
    components : tuple of str
    Q : (K, n) building-block mass ratios to the reference element.
    imputed : (K, n) bool, True where a block lacked the element and it was imputed.
    Q_sigma_dex : (K, n) 1-sigma of log10 Q, the end-member uncertainty of each block's
        ratio to the reference element: log10(1 + hypot(rel_i, rel_R)) from the blocks'
        relative 1-sigma (stored or documented default; imputed values carry their rule's
        uncertainty), 0 for the reference element. None for problems built without blocks.
    q_late : (n,) late component ratios (zeros when there is none).
    q_ci : (n,) the normaliser's ratios to R (CI unless the case names another).
    tc : (n,) condensation temperatures [K].
    D : (n,) effective partition coefficients (0 lithophile; Fe handled separately).
    oxide_factor : (n,) oxide mass per element mass in the mantle.
    atomic_weight : (n,) g/mol.
    cations : (n,) cations per oxide formula unit.
    fit_index : indices of elements used in the fit; y, sigma on those.
    metal_class : (n,) bool, True for chalcophile and siderophile elements (the class mask
        of the ``kinked-split`` volatility form).
    dropped : (element, reason) for every target element that is not fitted.
    implausible : target values far from the CI expectation (:func:`implausible_values`).
    normaliser : name of the normalising composition of ``q_ci`` and ``y`` (default CI).
    isotopes : one dict per isotope system: ``name``, ``carrier``, observed ``value`` and
        ``sigma``; per block (K,) ``eps``, ``eps_sigma`` (1-sigma of the end-member),
        ``q_carrier`` (carrier mass ratio to R), ``q_carrier_rel_sigma`` (its relative
        1-sigma); the late component's ``eps_late``, ``eps_sigma_late``, ``q_late``,
        ``q_carrier_rel_sigma_late``; ``range`` = span of the blocks' own ``eps``.
    """

    elements: tuple[str, ...]
    components: tuple[str, ...]
    Q: np.ndarray
    imputed: np.ndarray
    q_late: np.ndarray
    late_name: str | None
    c_late_R: float
    c_comp_R: np.ndarray
    q_ci: np.ndarray
    tc: np.ndarray
    D: np.ndarray
    D_spread: np.ndarray
    oxide_factor: np.ndarray
    atomic_weight: np.ndarray
    cations: np.ndarray
    reference: str
    ref_index: int
    fe_index: int
    mantle_Fe: float | None
    dIW: float | None
    fit_index: np.ndarray
    y: np.ndarray
    sigma: np.ndarray
    y_all: np.ndarray
    sigma_all: np.ndarray
    observed: np.ndarray
    volatility_form: str
    condensation_table: str
    late_max_fraction: float
    isotopes: tuple[dict[str, Any], ...]
    isotope_window_sigma: float
    notes: tuple[str, ...] = field(default=())
    Q_sigma_dex: np.ndarray | None = None
    metal_class: np.ndarray | None = None
    dropped: tuple[tuple[str, str], ...] = field(default=())
    implausible: tuple[dict[str, Any], ...] = field(default=())
    normaliser: str = "CI"
    #: (element, source of its D) of the core-formation elements: ``effective`` or the
    #: regression's source key (``[core] partitioning = "single-stage"``)
    D_sources: tuple[tuple[str, str], ...] = field(default=())
    #: the core-formation conditions of a single-stage problem (:mod:`inversion.conditions`)
    core_conditions: dict[str, Any] | None = None

    @property
    def n_fit(self) -> int:
        """Number of elements in the fit."""
        return int(self.fit_index.size)

    @property
    def fit_elements(self) -> list[str]:
        """Symbols of the fitted elements."""
        return [self.elements[i] for i in self.fit_index]

    @property
    def n_params_nonlinear(self) -> int:
        """Number of volatility parameters."""
        return len(get_form(self.volatility_form).params)

    def stacked(self, subsets: list[tuple[str, ...]], repeat: int) -> Problem:
        """Hypotheses of equal size stacked on the batch axis, each repeated ``repeat``
        times (one row per hypothesis and profile point): Q becomes (B, K, n)."""
        idx = np.array([[self.components.index(n) for n in s] for s in subsets])
        rows = np.repeat(idx, repeat, axis=0)
        iso = slice_isotopes(self.isotopes, rows)
        return replace(self, components=tuple(f"block{i}" for i in range(idx.shape[1])),
                        Q=self.Q[rows], imputed=self.imputed[idx[0]],
                        c_comp_R=self.c_comp_R[rows], isotopes=iso,
                        Q_sigma_dex=None if self.Q_sigma_dex is None
                        else self.Q_sigma_dex[rows])

    def subset(self, names: list[str] | tuple[str, ...]) -> Problem:
        """The same problem with only the named building blocks."""
        idx = [self.components.index(n) for n in names]
        iso = slice_isotopes(self.isotopes, np.asarray(idx, dtype=int))
        return replace(self, components=tuple(names), Q=self.Q[idx], imputed=self.imputed[idx],
                        c_comp_R=self.c_comp_R[idx], isotopes=iso,
                        Q_sigma_dex=None if self.Q_sigma_dex is None
                        else self.Q_sigma_dex[idx])


#: Per-building-block arrays of an isotope system (sliced with the blocks).
ISOTOPE_BLOCK_KEYS = ("eps", "q_carrier", "eps_sigma", "q_carrier_rel_sigma")


def isotope_range(eps: np.ndarray) -> tuple[Any, Any]:
    """Span of the blocks' own anomalies: ``(min, max)`` over the last axis.

    Floats for one hypothesis (``eps`` of shape (K,)), arrays of shape (B,) for stacked
    hypotheses. The late component is not included: its weight is capped, so the interval
    it can reach is computed with that cap (:func:`inversion.isotopes.reachable_intervals`).
    """
    eps = np.asarray(eps, float)
    if eps.ndim == 1:
        return float(eps.min()), float(eps.max())
    return eps.min(axis=-1), eps.max(axis=-1)


def slice_isotopes(isotopes: tuple[dict[str, Any], ...], idx: np.ndarray
                   ) -> tuple[dict[str, Any], ...]:
    """The isotope systems restricted to building blocks ``idx`` (1-D: a subset; 2-D:
    stacked hypotheses), with each system's ``range`` recomputed from those blocks."""
    out = []
    for d in isotopes:
        e = {**d}
        for key in ISOTOPE_BLOCK_KEYS:
            if key in d:
                e[key] = np.asarray(d[key])[idx]
        e["range"] = isotope_range(e["eps"])
        out.append(e)
    return tuple(out)


#: Imputation rule (see :func:`_impute`): neighbours used, the floor on the imputed value's
#: 1-sigma [dex] and the 1-sigma when no element of the same class is held.
IMPUTE_NEIGHBOURS = 5
IMPUTE_MIN_SIGMA_DEX = 0.20
IMPUTE_FALLBACK_SIGMA_DEX = 0.40


def _family(geochemical_class: str) -> str:
    return "lithophile" if geochemical_class in ("lithophile", "atmophile") else "metal"


def _impute(comp: pd.Series, ci: pd.Series, els: list[str], classes: pd.Series,
            tc: pd.Series | None = None, geo: pd.Series | None = None) -> tuple[
        np.ndarray, np.ndarray, np.ndarray]:
    """Fill the elements a component lacks; returns values, imputed flags, sigma [dex].

    Rule: CI times the component's own CI-normalised level (geometric median) over the
    :data:`IMPUTE_NEIGHBOURS` elements it holds that share the missing element's
    cosmochemical class and geochemical family (lithophile vs siderophile/chalcophile)
    and lie nearest to it in 50% condensation temperature (all of the class when the
    family has none). The 1-sigma is the scatter (standard deviation, dex) of those
    neighbours' levels, at least :data:`IMPUTE_MIN_SIGMA_DEX`; with no element of the same
    class held, the median over everything held with :data:`IMPUTE_FALLBACK_SIGMA_DEX`.
    """
    n = len(els)
    held = comp.reindex(els).to_numpy(float)
    have = np.nan_to_num(held, nan=0.0) > 0
    ci_v = ci.reindex(els).to_numpy(float)
    cls = classes.reindex(els).to_numpy(object)
    fam = (None if geo is None else
           np.array([_family(g) for g in geo.reindex(els).to_numpy(object)], dtype=object))
    tc_v = None if tc is None else tc.reindex(els).to_numpy(float)
    vals = np.where(have, held, np.nan)
    imp = ~have
    sig = np.zeros(n)
    with np.errstate(divide="ignore", invalid="ignore"):
        lognorm = np.log10(held / ci_v)
    present = np.flatnonzero(have)
    for j in np.flatnonzero(~have):
        same = present[cls[present] == cls[j]]
        if fam is not None:
            in_fam = same[fam[same] == fam[j]]
            same = in_fam if in_fam.size else same
        if same.size and tc_v is not None and np.isfinite(tc_v[j]):
            order = np.argsort(np.abs(tc_v[same] - tc_v[j]), kind="stable")
            same = same[order[:IMPUTE_NEIGHBOURS]]
        if same.size:
            levels = lognorm[same]
            level = float(np.median(levels))
            sig[j] = max(float(np.std(levels, ddof=1)) if same.size > 1 else 0.0,
                         IMPUTE_MIN_SIGMA_DEX)
        else:
            level = float(np.median(lognorm[present]))
            sig[j] = IMPUTE_FALLBACK_SIGMA_DEX
        vals[j] = ci_v[j] * 10.0 ** level
    return vals, imp, sig


def compile_problem(case: Case, *, minimum_sigma_dex: float | None = None,
                    fit_imputed: bool = True, pressure_GPa: float | None = None) -> Problem:
    """Compile a case into a :class:`Problem`.

    Elements in the mass balance: those with a CI value and a condensation temperature,
    held by at least one candidate, except :data:`MODEL_EXCLUDED`. Fitted: those among
    them in the target, not excluded, other than the reference element. An element some
    candidate lacks is imputed for that candidate (:func:`_impute`), flagged in
    ``imputed``, and fitted with its large uncertainty in ``Q_sigma_dex``.

    Parameters
    ----------
    case : Case
    minimum_sigma_dex : float, optional
        Floor on each element's uncertainty [dex] (model imperfection; recorded);
        default: the case's ``[target] minimum_uncertainty_dex`` (0.02 when not set).
    fit_imputed : bool
        Fit elements imputed for some candidate (default); False keeps them out of the
        fit, as before the end-member uncertainties existed.
    pressure_GPa : float, optional
        With ``[core] partitioning = "single-stage"``: the pressure at which to take the
        D (required when the case gives a range, which only ``planetmix fit`` infers;
        :func:`inversion.conditions.infer_pressure`).
    """
    floor_dex = (getattr(case, "minimum_uncertainty_dex", 0.02) if minimum_sigma_dex is None
                 else minimum_sigma_dex)
    ci = components.load("CI").composition
    props = components.elements()
    tc_col = CONDENSATION_TABLES[case.condensation_table]
    ref = case.target.reference_element
    names = [c.name for c in case.candidates]
    union = set()
    for c in case.candidates:
        union |= set(c.composition.index[c.composition > 0])
    for c in case.candidates:
        if ref not in c.composition.index or c.composition[ref] <= 0:
            raise InputError(f"building block {c.name} has no {ref}, the reference element",
                             file=c.path or None, field="element", value=ref)
    els = [e for e in props.index if e in union and e in ci.index and ci[e] > 0
           and e not in MODEL_EXCLUDED and np.isfinite(props.loc[e, tc_col])]
    if "Fe" not in els:
        raise InputError("no building block holds Fe", file=case.path,
                         field="building_blocks.candidates")
    tgt = case.target.composition
    absent = [e for e in tgt.index
              if e not in MODEL_EXCLUDED and e not in case.exclude and e not in union]
    if absent:
        row = list(tgt.index).index(absent[0]) + 2
        raise InputError(f"target element(s) {absent} are absent from every building block; "
                         "add them to [elements] exclude or choose other candidates",
                         file=case.target.path, row=row, field="element", value=absent[0])
    classes = props["cosmochemical_class"]
    Q = np.empty((len(names), len(els)))
    imputed = np.zeros_like(Q, dtype=bool)
    c_R = np.empty(len(names))
    Q_sig = np.zeros_like(Q)
    tc_series, geo = props[tc_col], props["geochemical_class"]
    for k, c in enumerate(case.candidates):
        vals, imp, imp_sig = _impute(c.composition, ci, els, classes, tc_series, geo)
        Q[k] = vals / c.composition[ref]
        imputed[k] = imp
        c_R[k] = c.composition[ref]
        rel = c.relative_uncertainty() if hasattr(c, "relative_uncertainty") else None
        rel_el = np.array([10.0 ** imp_sig[j] - 1.0 if imp[j] else
                           float(rel[e]) if rel is not None else 0.0
                           for j, e in enumerate(els)])
        rel_ref = float(rel[ref]) if rel is not None else 0.0
        Q_sig[k] = np.log10(1.0 + np.hypot(rel_el, rel_ref))
        Q_sig[k, els.index(ref)] = 0.0
    norm = getattr(case, "normaliser", None)
    norm_name = "CI" if norm is None else norm.name
    if norm is None:
        q_ci = np.array([ci[e] for e in els]) / ci[ref]
    else:
        nc = norm.composition
        if ref not in nc.index or not nc[ref] > 0:
            raise InputError(f"the normaliser {norm.name} has no {ref}, the reference element",
                             file=case.path, field="target.normaliser", value=norm.name)
        q_ci = np.array([nc[e] / nc[ref] if e in nc.index and nc[e] > 0 else np.nan
                         for e in els])
    if case.late_component is not None:
        lv = case.late_component
        vals, _, _ = _impute(lv.composition, ci, els, classes, tc_series, geo)
        q_late = vals / lv.composition[ref]
        c_late_R = float(lv.composition[ref])
        late_name = lv.name
    else:
        q_late, c_late_R, late_name = np.zeros(len(els)), 1.0, None
    part = default_partition()
    D = np.array([case.core.D.get(e, part["D"].get(e, 0.0)) for e in els], dtype=float)
    spread = np.array([part["log10_spread"].get(e, 0.0) for e in els], dtype=float)
    fe = els.index("Fe")
    D[fe] = 0.0
    mantle_Fe = None
    if case.core.mantle_FeO_wt is not None:
        mantle_Fe = case.core.mantle_FeO_wt / 100.0 * components.oxide_to_element_factor(
            "Fe", 1, 1)
    cations = np.array([components.parse_species(props.loc[e, "oxide"])[1] for e in els])
    # observations
    y_all = np.full(len(els), np.nan)
    s_all = np.full(len(els), np.nan)
    obs = np.full(len(els), np.nan)
    unc = case.target.uncertainty
    for j, e in enumerate(els):
        if e in tgt.index and tgt[e] > 0 and np.isfinite(q_ci[j]):
            obs[j] = tgt[e]
            y_all[j] = np.log10(tgt[e] / tgt[ref] / q_ci[j])
            rel = float(np.hypot(unc[e] / tgt[e], unc[ref] / tgt[ref])) if e != ref else 0.0
            s_all[j] = max(np.log10(1.0 + rel), floor_dex)
    fit = np.array([j for j, e in enumerate(els) if np.isfinite(y_all[j]) and e != ref
                    and e not in case.exclude
                    and (fit_imputed or not imputed[:, j].any())], dtype=int)
    notes = []
    zero_in_target = [e for e in tgt.index if tgt[e] <= 0]
    if zero_in_target:
        notes.append(f"target elements with zero concentration not fitted: {zero_in_target}")
    held_out = [e for j, e in enumerate(els) if np.isfinite(y_all[j]) and imputed[:, j].any()
                and e not in case.exclude]
    if held_out:
        notes.append("target elements missing from some building block (imputed by the "
                     "group's own CI-normalised level at similar Tc, "
                     + ("fitted with the imputation's 1-sigma" if fit_imputed else
                        "not fitted") + f"): {held_out}")
    dropped = _dropped(case, els, fit, y_all, imputed, q_ci, norm_name, tc_col, ci)
    if fit.size < 3:
        raise InputError(f"only {fit.size} elements can be fitted; the target and the "
                         "building blocks share too few elements", file=case.target.path)
    iso = []
    iso_table = components.isotopes()
    for qname, (val, sig) in case.isotopes.items():
        carrier = ISOTOPE_CARRIERS[qname]
        eps, qc, eps_sig, qc_rel = [], [], [], []
        for c in list(case.candidates) + ([case.late_component] if case.late_component
                                          else []):
            rows = iso_table[(iso_table["body"] == c.name) & (iso_table["quantity"] == qname)]
            if qname in c.isotopes:
                eps_value, eps_unc = c.isotopes[qname]
            elif not rows.empty:
                eps_value = float(rows["value"].iloc[0])
                eps_unc = float(rows["uncertainty"].iloc[0])
            else:
                raise InputError(f"no {qname} value for building block {c.name} in the "
                                 f"library; remove the constraint or the candidate, or give "
                                 f"it in the component file as '# {qname}: value 1-sigma'",
                                 file=case.path, field=f"isotopes.{qname}", value=c.name)
            if carrier not in c.composition.index:
                raise InputError(f"building block {c.name} has no {carrier}, the carrier of "
                                 f"{qname}", file=case.path, field=f"isotopes.{qname}")
            eps.append(eps_value)
            qc.append(float(c.composition[carrier] / c.composition[ref]))
            # end-member 1-sigma (0 where none is given, e.g. the Earth, the zero of the
            # scale) and the relative 1-sigma of the carrier ratio c_carrier / c_R
            eps_sig.append(eps_unc if np.isfinite(eps_unc) else 0.0)
            rel = [float(c.uncertainty.get(e, np.nan) / c.composition[e])
                   for e in {carrier, ref}]
            qc_rel.append(float(np.hypot.reduce([r for r in rel if np.isfinite(r)] or [0.0])))
        K = len(case.candidates)
        iso.append({"name": qname, "carrier": carrier, "value": val, "sigma": sig,
                    "eps": np.array(eps[:K]), "q_carrier": np.array(qc[:K]),
                    "eps_sigma": np.array(eps_sig[:K]),
                    "q_carrier_rel_sigma": np.array(qc_rel[:K]),
                    "eps_late": eps[K] if len(eps) > K else 0.0,
                    "q_late": qc[K] if len(qc) > K else 0.0,
                    "eps_sigma_late": eps_sig[K] if len(eps) > K else 0.0,
                    "q_carrier_rel_sigma_late": qc_rel[K] if len(qc) > K else 0.0,
                    "range": isotope_range(np.array(eps[:K]))})
    problem = Problem(
        elements=tuple(els), components=tuple(names), Q=Q, imputed=imputed, q_late=q_late,
        late_name=late_name, c_late_R=c_late_R, c_comp_R=c_R, q_ci=q_ci,
        tc=props.loc[els, tc_col].to_numpy(float), D=D, D_spread=spread,
        oxide_factor=props.loc[els, "oxide_factor"].to_numpy(float),
        atomic_weight=props.loc[els, "atomic_weight"].to_numpy(float), cations=cations,
        reference=ref, ref_index=els.index(ref), fe_index=fe, mantle_Fe=mantle_Fe,
        dIW=case.core.dIW, fit_index=fit, y=y_all[fit], sigma=s_all[fit], y_all=y_all,
        sigma_all=s_all, observed=obs, volatility_form=case.volatility_form,
        condensation_table=case.condensation_table,
        late_max_fraction=case.late_max_fraction if late_name else 0.0,
        isotopes=tuple(iso), isotope_window_sigma=case.isotope_window_sigma,
        notes=tuple(notes), Q_sigma_dex=Q_sig,
        metal_class=np.isin(props.loc[els, "geochemical_class"].to_numpy(), METAL_CLASSES),
        dropped=dropped, implausible=implausible_values(case), normaliser=norm_name,
        D_sources=tuple((e, "effective") for e, d in zip(els, D, strict=True) if d > 0),
    )
    if case.core.partitioning == "effective":
        return problem
    from .conditions import at_case_conditions

    return at_case_conditions(problem, case, pressure_GPa)


#: Geochemical classes that the ``kinked-split`` form gives their own volatility slope.
METAL_CLASSES = ("chalcophile", "siderophile_moderate", "siderophile_highly")
#: A target value further than this from the CI expectation [dex] is reported.
IMPLAUSIBLE_DEX = 2.0
#: Unit mix-ups a factor points to: log10 factor -> wording.
_UNIT_SLIPS = {3.0: "ppm given where ppb was meant (factor 1000)",
               -3.0: "ppb given where ppm was meant (factor 1000)",
               4.0: "wt% given where ppm was meant (factor 10^4)",
               -4.0: "ppm given where wt% was meant (factor 10^4)",
               7.0: "wt% given where ppb was meant (factor 10^7)",
               -7.0: "ppb given where wt% was meant (factor 10^7)"}


def implausible_values(case: Case, *, threshold_dex: float = IMPLAUSIBLE_DEX
                       ) -> tuple[dict[str, Any], ...]:
    """Target values far from what CI times the ratio to the reference element predicts.

    For each target element X other than the reference R, the offset
    ``log10[(C_X / C_R)_target / (C_X / C_R)_CI]``; an offset beyond ``threshold_dex`` is
    reported unless the element's known behaviour explains it: highly siderophile
    elements (stripped by core formation), highly volatile and atmophile elements, and
    the depletion (not an excess) of moderately volatile elements, which volatile loss
    and core formation together take to -3 dex in the Earth's mantle (S, Se, Te). A unit
    slip is therefore caught on refractory and main-component elements and on any
    excess. The nearest unit slip (ppb vs ppm, ppm vs wt%) within 0.7 dex is named.

    Parameters
    ----------
    case : Case
    threshold_dex : float
        Reporting threshold [dex].

    Returns
    -------
    tuple of dict
        ``element``, ``file``, ``row`` (1-based line of the CSV, header = 1), ``value_ppm``,
        ``offset_dex`` and ``likely`` (the unit slip, or ``None``).
    """
    ci = components.load("CI").composition
    props = components.elements()
    tgt = case.target.composition
    ref = case.target.reference_element
    out = []
    for i, e in enumerate(tgt.index):
        if e == ref or e in MODEL_EXCLUDED or not tgt[e] > 0 or e not in ci.index \
                or not ci[e] > 0 or e not in props.index:
            continue
        if props.loc[e, "geochemical_class"] in ("siderophile_highly", "atmophile") \
                or props.loc[e, "cosmochemical_class"] == "highly_volatile":
            continue
        off = float(np.log10(tgt[e] / tgt[ref] / (ci[e] / ci[ref])))
        if abs(off) <= threshold_dex or (
                off < 0 and props.loc[e, "cosmochemical_class"] == "moderately_volatile"):
            continue
        slip = min(_UNIT_SLIPS, key=lambda f: abs(off - f))
        out.append({"element": e, "file": case.target.path, "row": i + 2,
                    "value_ppm": float(tgt[e] * 1e6), "offset_dex": off,
                    "likely": _UNIT_SLIPS[slip] if abs(off - slip) <= 0.7 else None})
    return tuple(out)


def implausible_lines(items: tuple[dict[str, Any], ...]) -> list[str]:
    """One warning line per implausible value (CLI summary)."""
    return [f"implausible value: {d['element']} in {d['file']} row {d['row']} "
            f"({d['value_ppm']:.4g} ppm) is {d['offset_dex']:+.2f} dex from CI x its ratio to "
            "the reference element" + (f"; likely {d['likely']}" if d["likely"] else "")
            + " (fitted as given)" for d in items]


def _dropped(case: Case, els: list[str], fit: np.ndarray, y_all: np.ndarray,
             imputed: np.ndarray, q_ci: np.ndarray, norm_name: str, tc_col: str,
             ci: pd.Series) -> tuple[tuple[str, str], ...]:
    """Every target element that is not fitted, with the reason."""
    props = components.elements()
    fitted = {els[j] for j in fit}
    tgt = case.target.composition
    out = []
    for e in tgt.index:
        if e in fitted:
            continue
        j = els.index(e) if e in els else None
        if e == case.target.reference_element:
            why = "reference element (every ratio is taken to it)"
        elif e in MODEL_EXCLUDED:
            why = ("not in the mass balance (oxygen from stoichiometry; H, C, N and the "
                   "noble gases are outside the oxide budget)")
        elif not tgt[e] > 0:
            why = "zero concentration in the target"
        elif e in case.exclude:
            why = "excluded by the case ([elements] exclude)"
        elif e not in ci.index or not ci[e] > 0:
            why = "no CI value (needed for the imputation rule and the normalisation)"
        elif e not in props.index or not np.isfinite(props.loc[e, tc_col]):
            why = f"no 50% condensation temperature in {case.condensation_table}"
        elif j is not None and not np.isfinite(q_ci[j]):
            why = f"no value in the normaliser {norm_name}"
        elif j is not None and imputed[:, j].any():
            why = "missing from some building block and fit_imputed is off"
        else:
            why = "not in the mass balance"
        out.append((e, why))
    return tuple(out)


def _core_split(a: np.ndarray, p: Problem, D: np.ndarray, k0: np.ndarray | None = None
                ) -> dict[str, np.ndarray]:
    """Mass balance between mantle and core for bulk ``a`` (B, n) per unit mass of R
    (:func:`inversion.kernel.solve_core` on numpy); ``k0`` (B,) warm-starts k."""
    c = kernel.static_of(p)
    s0 = None
    if k0 is not None:
        s0 = kernel.start_state(np, c, (a.shape[0],))
        s0[:, 0] = np.asarray(k0, float).reshape(-1)
    s, res = kernel.solve_core(np, c, a, D, s0)
    return {"mantle": res["mantle"], "core": res["core"], "M_s": res["M_s"][:, 0],
            "M_c": res["M_c"][:, 0], "k": s[:, 0], "D_Fe": res["D_Fe"][:, 0]}


def relative_log_retained(p: Problem, vol: np.ndarray) -> np.ndarray:
    """Volatility factor log10(r_i / r_R) for each parameter set, shape (B, n)."""
    return kernel.relative_log_retained(np, kernel.static_of(p), np.atleast_2d(vol))


def forward(p: Problem, w: np.ndarray, vol: np.ndarray, lam: np.ndarray | float = 0.0,
            *, D: np.ndarray | None = None, dIW: np.ndarray | None = None
            ) -> dict[str, np.ndarray]:
    """Run the forward model for a batch of parameter sets (:func:`inversion.kernel.forward`
    on numpy).

    Parameters
    ----------
    p : Problem
    w : ndarray, shape (B, K)
        R-basis weights of the building blocks (rows on the simplex).
    vol : ndarray, shape (B, p)
        Volatility parameters of ``p.volatility_form``.
    lam : float or ndarray, shape (B,)
        Late-accretion mass fraction of the final mantle.
    D : ndarray, shape (n,) or (B, n), optional
        Effective partition coefficients (defaults to ``p.D``).
    dIW : ndarray, shape (B,), optional
        Per-row redox state of the iron split (a problem with the redox split only;
        defaults to ``p.dIW``).

    Returns
    -------
    dict of ndarray
        ``log10N`` (B, n) CI- and R-normalised abundances of the final silicate;
        ``ratio`` (B, n) final mantle mass ratios to R; ``bulk`` (B, n) bulk planet per
        unit R; ``mantle`` and ``core`` (B, n) element masses per unit R before late
        accretion; ``M_s``, ``M_c``, ``k``, ``cmf`` (B,); ``v`` (B,) R-basis late weight;
        ``x`` (B, K) bulk mass fractions of the building blocks; ``D_Fe`` (B,).
    """
    w = np.atleast_2d(np.asarray(w, float))
    vol = np.atleast_2d(np.asarray(vol, float))
    B = max(w.shape[0], vol.shape[0])
    w = np.broadcast_to(w, (B, w.shape[1]))
    vol = np.broadcast_to(vol, (B, vol.shape[1]))
    lam = np.broadcast_to(np.asarray(lam, float), (B,))
    c = kernel.static_of(p)
    if dIW is not None:
        if p.dIW is None:
            raise ValueError("a per-row dIW needs a problem with the redox iron split")
        c = replace(c, dIW=np.broadcast_to(np.asarray(dIW, float), (B,)))
    with np.errstate(divide="ignore"):
        out = kernel.forward(np, c, w, vol, lam, p.D if D is None else np.asarray(D, float))
    out.pop("state")
    return out


def lam_from_v(p: Problem, v: np.ndarray, M_s: np.ndarray) -> np.ndarray:
    """Late-accretion mass fraction from its R-basis weight ``v`` (inverse of the above)."""
    c_R = 1.0 / np.asarray(M_s)
    num = v * c_R
    return num / (num + (1.0 - v) * p.c_late_R)
