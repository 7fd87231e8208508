"""What the volatility diagram is read for, computed rather than judged by eye.

- the refractory lithophile level relative to CI (weighted mean of log10 N, with its
  standard error inflated by the scatter when the scatter exceeds the stated errors);
- whether volatile loss followed one trend independent of geochemical class: a
  likelihood-ratio test of the fitted model (form ``kinked``) against the nested model
  with a separate slope for the chalcophile and siderophile elements (form
  ``kinked-split``, the same building blocks, core and late accretion), with the slope
  difference, its 1-sigma from the nested fit's Gauss-Newton covariance, the statistic
  and its p-value (chi2 with one degree of freedom under the null);
- the highly siderophile excess as a late-accretion mass;
- the elements that sit off the fitted model (|z| > 3: residual after volatility, core
  and late accretion), with size, direction and geochemical class;
- whether the fitted volatility onset lies above the reference element's own Tc (the
  reference element itself depleted, which every ratio then hides).

Regressing the raw log10 N of each class on Tc (the former reading) mixes core depletion
and the late-accretion floor into the slopes and reported class differences where there
were none; the nested fit keeps those shared.
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any

import numpy as np
from scipy import stats

import components

from .fit import FitResult, FitSettings, fit_problem
from .model import Problem
from .volatility import SPLIT_FORM, get_form, log10_retained

__all__ = ["findings", "weighted_slope", "class_test", "OUTLIER_Z", "CLASS_TEST_SIGMA",
           "ONSET_TOLERANCE_DEX"]

OUTLIER_Z = 3.0
#: Significance [sigma, two-sided Normal equivalent] at which the classes are said to differ.
CLASS_TEST_SIGMA = 3.0
#: The reference element counts as depleted when the fit retains less than this [dex].
ONSET_TOLERANCE_DEX = 0.01
#: Building blocks with a smaller weight are left out of the nested (split) fit.
_SUPPORT_WEIGHT = 1e-6


def class_test(p: Problem, result: FitResult, settings: FitSettings | None = None
               ) -> dict[str, Any]:
    """Likelihood-ratio test of one volatility trend against class-specific slopes.

    The nested model ``kinked-split`` adds ``slope_offset`` to the slope of the
    chalcophile and siderophile elements; it is fitted on the building blocks of
    ``result`` with non-zero weight (a fit on fewer blocks can only fit worse, so the
    statistic is conservative). ``LR = chi2_common - chi2_split`` follows chi2(1) under
    the null; the significance is the Normal quantile of its p-value (sqrt(LR)).

    Parameters
    ----------
    p : Problem
        Compiled with the ``kinked`` form.
    result : FitResult
        The fit of ``p``.
    settings : FitSettings, optional
        Settings of the nested fit.

    Returns
    -------
    dict
        JSON-ready: ``status`` (``done`` or ``not run``), ``slope_difference_dex_per_1000K``
        (chalcophile+siderophile minus lithophile), ``uncertainty`` (1-sigma),
        ``uncertainty_method``, ``lr_statistic``, ``p_value``, ``significance_sigma``,
        ``threshold_sigma``, ``differ`` and ``statement``.
    """
    if p.volatility_form != "kinked" or not result.feasible:
        return {"status": "not run",
                "reason": "the class test nests in the kinked form; this fit uses "
                          f"{p.volatility_form}" if result.feasible else "infeasible fit"}
    fi = p.fit_index
    metal = p.metal_class[fi]
    tc = p.tc[fi]
    depleted = tc < result.volatility["T0"]
    n_met, n_lit = int((metal & depleted).sum()), int((~metal & depleted).sum())
    support = [c for c in result.components if result.weights.get(c, 0.0) > _SUPPORT_WEIGHT]
    ps = replace(p, volatility_form=SPLIT_FORM).subset(support)
    r2 = fit_problem(ps, settings or FitSettings(cmf_range=result.settings.cmf_range))
    d = 1000.0 * r2.volatility["slope_offset"]
    lr = max(0.0, result.chi2 - r2.chi2)
    pval = float(stats.chi2.sf(lr, 1))
    sig = math.sqrt(lr)
    q = r2.intervals.get("quantities", {}).get("volatility:slope_offset", {})
    sd = 1000.0 * float(q.get("sd", float("nan")))
    method = "Gauss-Newton covariance of the nested fit (Laplace, delta chi2 = 1)"
    if not (math.isfinite(sd) and sd > 0):
        sd = abs(d) / sig if sig > 0 else float("nan")
        method = "profile chi2 curvature: |difference| / sqrt(LR)"
    differ = sig >= CLASS_TEST_SIGMA
    slope = 1000.0 * result.volatility["slope"]
    statement = (f"classes differ by {d:+.2f} +- {sd:.2f} dex per 1000 K (chalcophile and "
                 f"siderophile minus lithophile) at {sig:.1f} sigma" if differ else
                 f"consistent with one trend independent of geochemical class (difference "
                 f"{d:+.2f} +- {sd:.2f} dex per 1000 K, {sig:.1f} sigma)")
    return {"status": "done", "common_slope_dex_per_1000K": slope,
            "slope_difference_dex_per_1000K": d, "uncertainty": sd,
            "uncertainty_method": method, "lr_statistic": lr, "p_value": pval,
            "significance_sigma": sig, "threshold_sigma": CLASS_TEST_SIGMA,
            "differ": bool(differ), "chi2_common": result.chi2, "chi2_split": r2.chi2,
            "split_components": support,
            "n_depleted": {"lithophile": n_lit, "chalcophile_siderophile": n_met},
            "circularity": "the default partition coefficients are calibrated on the Earth "
                           "(McDonough 2003 core over McDonough & Sun 1995 mantle), which "
                           "assumes the Earth's siderophile depletion is core formation on "
                           "top of one volatility trend: for the Earth, and for bodies "
                           "fitted with these D, the test is partly circular",
            "statement": statement}


def _onset(p: Problem, result: FitResult) -> dict[str, Any]:
    """Is the reference element itself depleted by the fitted volatility form?"""
    form = get_form(p.volatility_form)
    th = np.array([[result.volatility[n] for n in form.params]])
    tc_r = p.tc[p.ref_index]
    logr_r = float(log10_retained(p.volatility_form, th, np.array([tc_r]),
                                  metal=p.metal_class[[p.ref_index]])[0, 0])
    out: dict[str, Any] = {"reference_element": p.reference, "reference_tc_K": float(tc_r),
                           "reference_log10_retained": logr_r,
                           "above_reference_tc": bool(logr_r < -ONSET_TOLERANCE_DEX)}
    if "T0" in form.params:
        out["onset_K"] = float(result.volatility["T0"])
    elif p.volatility_form == "power" and result.volatility["a"] > 0:
        out["onset_K"] = float(10 ** (-result.volatility["b"] / result.volatility["a"]))
    if out["above_reference_tc"]:
        out["warning"] = (f"the volatility onset lies above the Tc of {p.reference} "
                          f"({tc_r:.0f} K): the reference element is itself depleted "
                          f"({logr_r:+.2f} dex) and every ratio hides that loss")
    return out


def _wmean(y: np.ndarray, s: np.ndarray) -> tuple[float, float]:
    w = 1.0 / s**2
    m = float((w * y).sum() / w.sum())
    se = math.sqrt(1.0 / w.sum())
    if y.size > 1:
        chi2r = float((w * (y - m) ** 2).sum() / (y.size - 1))
        se *= math.sqrt(max(1.0, chi2r))
    return m, se


def weighted_slope(x: np.ndarray, y: np.ndarray, s: np.ndarray) -> tuple[float, float]:
    """Weighted least-squares slope of y on x and its standard error (scatter-inflated).

    Examples
    --------
    >>> import numpy as np
    >>> round(weighted_slope(np.array([0., 1, 2]), np.array([1., 3, 5]), np.ones(3))[0], 6)
    2.0
    """
    w = 1.0 / s**2
    X = np.stack([np.ones_like(x), x], axis=1)
    cov = np.linalg.inv(X.T @ (w[:, None] * X))
    beta = cov @ X.T @ (w * y)
    r = y - X @ beta
    dof = max(x.size - 2, 1)
    chi2r = float((w * r**2).sum() / dof)
    return float(beta[1]), float(math.sqrt(cov[1, 1] * max(1.0, chi2r)))


def findings(p: Problem, result: FitResult, *, planet_mass_kg: float | None = None,
             class_settings: FitSettings | None = None, run_class_test: bool = True
             ) -> dict[str, Any]:
    """Quantitative readings of the diagram for one fit (JSON-ready dict).

    ``run_class_test`` False leaves out the nested fit of :func:`class_test` (one more fit).
    """
    props = components.elements().loc[list(p.elements)]
    obs = np.isfinite(p.y_all)
    geo = props["geochemical_class"].to_numpy()
    cos = props["cosmochemical_class"].to_numpy()
    out: dict[str, Any] = {}
    rl = obs & (geo == "lithophile") & (cos == "refractory")
    if rl.sum() >= 1:
        m, se = _wmean(p.y_all[rl], p.sigma_all[rl])
        out["refractory_lithophile_level"] = {
            "log10_relative_to_CI": m, "uncertainty_dex": se, "factor": 10**m,
            "elements": [e for e, k in zip(p.elements, rl, strict=True) if k],
            "basis": f"{p.normaliser}- and {p.reference}-normalised, weighted mean",
            "normaliser": p.normaliser}
    if run_class_test and result.feasible:
        out["class_independence"] = class_test(p, result, class_settings)
    if result.feasible:
        out["volatility_onset"] = _onset(p, result)
    if result.feasible and p.late_name is not None:
        lam = result.late_accretion_fraction
        la = {"fraction_of_mantle": lam, "component": p.late_name,
              "fraction_of_planet": lam * (1 - result.core_mass_fraction)}
        if planet_mass_kg:
            la["mass_kg"] = la["fraction_of_planet"] * planet_mass_kg
        out["late_accretion"] = la
    if result.feasible:
        r = result.residuals
        off = r[np.isfinite(r["z"]) & (r["z"].abs() > OUTLIER_Z)]
        gcls = dict(zip(p.elements, geo, strict=True))
        out["off_trend"] = [
            {"element": e, "z": float(z), "offset_dex": float(o - m),
             "direction": "above model" if z > 0 else "below model", "fitted": bool(f),
             "geochemical_class": str(gcls.get(e, "unknown")),
             "basis": "residual after volatility, core formation and late accretion"}
            for e, z, o, m, f in zip(off["element"], off["z"], off["observed"], off["model"],
                                     off["fitted"], strict=True)]
    return out


def summary_lines(f: dict[str, Any]) -> list[str]:
    """Human-readable lines for the CLI."""
    lines = []
    if "refractory_lithophile_level" in f:
        r = f["refractory_lithophile_level"]
        lines.append(f"refractory lithophiles: {r['factor']:.3f} x "
                     f"{r.get('normaliser', 'CI')} "
                     f"({r['log10_relative_to_CI']:+.3f} +- {r['uncertainty_dex']:.3f} dex)")
    c = f.get("class_independence", {})
    if c.get("status") == "done":
        lines.append(f"volatility and class: {c['statement']} (likelihood ratio "
                     f"{c['lr_statistic']:.2f}, p = {c['p_value']:.3g}; threshold "
                     f"{c['threshold_sigma']:.0f} sigma)")
        lines.append("  note: " + c["circularity"])
    o = f.get("volatility_onset", {})
    if o.get("above_reference_tc"):
        lines.append("warning: " + o["warning"])
    if "late_accretion" in f:
        la = f["late_accretion"]
        if la["fraction_of_mantle"] <= 1e-9:
            lines.append("late accretion: none (the fit puts the late component at zero)")
        else:
            extra = f", {la['mass_kg']:.3g} kg" if "mass_kg" in la else ""
            lines.append(f"late accretion: {100 * la['fraction_of_mantle']:.3g}% of the "
                         f"mantle ({100 * la['fraction_of_planet']:.3g}% of the planet{extra})")
    for o in f.get("off_trend", []):
        lines.append(f"off trend: {o['element']} ({o['geochemical_class']}) {o['direction']} by "
                     f"{o['offset_dex']:+.2f} dex (z = {o['z']:+.1f})")
    return lines
