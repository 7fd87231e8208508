"""What the volatility diagram is read for, computed rather than judged by eye.

- the refractory lithophile level relative to CI (weighted mean of log10 N, with its
  standard error inflated by the scatter when the scatter exceeds the stated errors);
- whether volatile loss followed one trend independent of geochemical class: a
  likelihood-ratio test of the fitted model (form ``kinked``) against the nested model
  with a separate slope for the chalcophile and siderophile elements (form
  ``kinked-split``, the same building blocks, core and late accretion), with the slope
  difference, its 1-sigma from the nested fit's Gauss-Newton covariance, the statistic
  and its p-value (chi2 with one degree of freedom under the null; scaled by the reduced
  chi2 and referred to F when the misfit exceeds the stated uncertainties); from two
  sampled posteriors, the posterior of the difference and the LOO comparison
  (:func:`class_test_posterior`, run by `planetmix sample --class-test`);
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

__all__ = ["findings", "weighted_slope", "class_test", "class_test_posterior", "OUTLIER_Z",
           "CLASS_TEST_SIGMA", "ONSET_TOLERANCE_DEX", "CIRCULARITY"]

OUTLIER_Z = 3.0
#: Significance [sigma, two-sided Normal equivalent] at which the classes are said to differ.
CLASS_TEST_SIGMA = 3.0
#: The reference element counts as depleted when the fit retains less than this [dex].
ONSET_TOLERANCE_DEX = 0.01
#: Building blocks with a smaller weight are left out of the nested (split) fit.
_SUPPORT_WEIGHT = 1e-6
#: The class test scales LR by the reduced chi2 when the nested fit's goodness-of-fit
#: p-value (chi2 with n - p degrees of freedom) falls below this.
MISFIT_P = 0.05
#: The nested fit also starts from the common fit with slope_offset moved by this [dex/K].
_OFFSET_START = 5e-4
#: When the partition coefficients are calibrated on the Earth with one volatility trend,
#: the class test of the Earth (and of any body fitted with those D) is partly circular.
CIRCULARITY = ("the default partition coefficients are calibrated on the Earth (McDonough "
               "2003 core over McDonough & Sun 1995 mantle), which assumes the Earth's "
               "siderophile depletion is core formation on top of one volatility trend: for "
               "the Earth, and for bodies fitted with these D, the test is then partly "
               "circular")


def class_test(p: Problem, result: FitResult, settings: FitSettings | None = None
               ) -> dict[str, Any]:
    """Likelihood-ratio test of one volatility trend against class-specific slopes.

    The nested model ``kinked-split`` adds ``slope_offset`` to the slope of the
    chalcophile and siderophile elements; it is fitted on the building blocks of
    ``result`` with non-zero weight (a fit on fewer blocks can only fit worse, so the
    statistic is conservative), started from the common fit itself (``slope_offset`` 0,
    so the nested optimum is never worse than the common one) and from the common fit
    with the offset moved by +-:data:`_OFFSET_START` besides the fit's own profile starts
    (the misfit is not convex in ``slope_offset``).

    ``LR = chi2_common - chi2_split`` follows chi2(1) under the null when the stated
    variances are right. When the nested fit's misfit rejects them (goodness-of-fit
    p-value below :data:`MISFIT_P`: the model is not exact, e.g. partition coefficients
    off their true values), LR is scaled by the reduced chi2 ``s2 = chi2_split / (n - p)``
    and referred to F(1, n - p), and the
    uncertainty of the difference is inflated by ``sqrt(s2)`` (the quasi-likelihood form
    of the test, common practice; without it, scatter the common trend cannot absorb
    is read as a class difference). The significance is the two-sided Normal quantile of
    the p-value.

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
        ``uncertainty_method``, ``lr_statistic``, ``scatter_scale`` (``s2``),
        ``p_value``, ``significance_sigma``, ``threshold_sigma``, ``differ`` and
        ``statement``.
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
    starts = []
    if result.u:
        u = np.asarray(result.u, float)
        K = len(result.components)
        u_sub = tuple(u[[result.components.index(c) for c in support]].tolist()
                      + u[K:].tolist())
        starts = [replace(result, components=tuple(support), u=u_sub,
                          volatility={"T0": result.volatility["T0"],
                                      "slope": result.volatility["slope"],
                                      "slope_offset": off})
                  for off in (0.0, -_OFFSET_START, _OFFSET_START)]
    r2 = fit_problem(ps, settings or FitSettings(cmf_range=result.settings.cmf_range),
                     starts=starts)
    d = 1000.0 * r2.volatility["slope_offset"]
    lr = max(0.0, result.chi2 - r2.chi2)
    dof = max(r2.n_elements - r2.n_params, 1)
    # the stated variances are trusted unless the nested fit's misfit rejects them
    fit_p = float(stats.chi2.sf(r2.chi2, dof))
    s2 = r2.chi2 / dof if fit_p < MISFIT_P else 1.0
    if s2 > 1.0:
        pval = float(stats.f.sf(lr / s2, 1, dof))
    else:
        pval = float(stats.chi2.sf(lr, 1))
    sig = float(stats.norm.isf(pval / 2.0)) if pval > 0 else math.sqrt(lr / s2)
    q = r2.intervals.get("quantities", {}).get("volatility:slope_offset", {})
    sd = 1000.0 * float(q.get("sd", float("nan"))) * math.sqrt(s2)
    method = "Gauss-Newton covariance of the nested fit (Laplace, delta chi2 = 1)"
    if not (math.isfinite(sd) and sd > 0):
        sd = abs(d) / math.sqrt(lr / s2) if lr > 0 else float("nan")
        method = "profile chi2 curvature: |difference| / sqrt(LR)"
    if s2 > 1.0:
        method += f", inflated by sqrt(reduced chi2) = {math.sqrt(s2):.2f}"
    differ = sig >= CLASS_TEST_SIGMA
    slope = 1000.0 * result.volatility["slope"]
    statement = (f"classes differ by {d:+.2f} +- {sd:.2f} dex per 1000 K (chalcophile and "
                 f"siderophile minus lithophile) at {sig:.1f} sigma" if differ else
                 f"consistent with one trend independent of geochemical class (difference "
                 f"{d:+.2f} +- {sd:.2f} dex per 1000 K, {sig:.1f} sigma)")
    return {"status": "done", "common_slope_dex_per_1000K": slope,
            "slope_difference_dex_per_1000K": d, "uncertainty": sd,
            "uncertainty_method": method, "lr_statistic": lr, "scatter_scale": s2,
            "misfit_p_value": fit_p,
            "reference_distribution": (f"F(1, {dof}) of LR / {s2:.3g}" if s2 > 1.0
                                       else "chi2(1)"),
            "p_value": pval, "significance_sigma": sig, "threshold_sigma": CLASS_TEST_SIGMA,
            "differ": bool(differ), "chi2_common": result.chi2, "chi2_split": r2.chi2,
            "split_components": support,
            "n_depleted": {"lithophile": n_lit, "chalcophile_siderophile": n_met},
            "circularity": CIRCULARITY,
            "statement": statement}


def class_test_posterior(common: Any, split: Any, *, offset_name: str = "slope_offset",
                         var_name: str | None = None) -> dict[str, Any]:
    """The Bayesian class test from two sampled posteriors.

    Parameters
    ----------
    common, split : arviz.InferenceData
        Posteriors of the common-trend model (``kinked``) and of the class-split model
        (``kinked-split``) of the same observations, each with a ``log_likelihood`` group
        (pointwise, one value per element).
    offset_name : str
        The split model's posterior variable of the slope difference [dex/K].
    var_name : str, optional
        The log-likelihood variable, when a group holds more than one.

    Returns
    -------
    dict
        JSON-ready: ``slope_difference_dex_per_1000K`` (posterior ``mean``, ``sd``, ``p5``,
        ``p95`` and ``prob_positive``); ``loo`` with each model's ``elpd_loo`` and the
        difference ``elpd_split_minus_common`` with its standard error ``dse`` (from the
        pointwise differences), ``pareto_k_max`` of each; ``prefers`` (``split`` when the
        difference exceeds 2 ``dse``, ``common`` when below -2 ``dse``, else
        ``neither``) and ``statement``.
    """
    import arviz as az

    if offset_name not in split.posterior:
        raise ValueError(f"the split posterior has no variable {offset_name!r}")
    draws = 1000.0 * np.asarray(split.posterior[offset_name], float).ravel()
    lo, hi = np.percentile(draws, [5.0, 95.0])
    post = {"mean": float(draws.mean()), "sd": float(draws.std(ddof=1)), "p5": float(lo),
            "p95": float(hi), "prob_positive": float((draws > 0).mean())}
    loos = {k: az.loo(d, pointwise=True, var_name=var_name)
            for k, d in (("common", common), ("split", split))}
    pw = {k: np.asarray(v.loo_i, float).ravel() for k, v in loos.items()}
    if pw["common"].size != pw["split"].size:
        raise ValueError("the two posteriors have different numbers of observations")
    diff = pw["split"] - pw["common"]
    elpd = float(diff.sum())
    dse = float(math.sqrt(diff.size * diff.var(ddof=1))) if diff.size > 1 else float("nan")
    prefers = ("split" if elpd > 2 * dse else "common" if elpd < -2 * dse else "neither")
    words = {"split": "the class-split trend predicts better", "common": "the common trend "
             "predicts better", "neither": "neither model predicts better"}[prefers]
    statement = (f"posterior slope difference {post['mean']:+.2f} +- {post['sd']:.2f} dex per "
                 f"1000 K (90% {post['p5']:+.2f} to {post['p95']:+.2f}); LOO: {words} "
                 f"(elpd difference {elpd:+.1f} +- {dse:.1f})")
    return {"slope_difference_dex_per_1000K": post,
            "loo": {"elpd_loo": {k: float(v.elpd_loo) for k, v in loos.items()},
                    "elpd_split_minus_common": elpd, "dse": dse,
                    "pareto_k_max": {k: float(np.nanmax(np.asarray(v.pareto_k)))
                                     for k, v in loos.items()}},
            "prefers": prefers, "statement": statement,
            "status": "computed from the two sampled posteriors"}


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
        scaled = (f", scaled by the reduced chi2 {c['scatter_scale']:.2f} of a misfit beyond "
                  f"the stated errors" if c.get("scatter_scale", 1.0) > 1.0 else "")
        lines.append(f"volatility and class: {c['statement']} (likelihood ratio "
                     f"{c['lr_statistic']:.2f}{scaled}, p = {c['p_value']:.3g}; threshold "
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
    off = f.get("off_trend", [])
    if off:
        lines.append(f"off trend (|z| > {OUTLIER_Z:g}; {off[0]['basis']}):")
    for o in off:
        where = "above" if o["direction"] == "above model" else "below"
        lines.append(f"  {o['element']}, {o['geochemical_class'].replace('_', ' ')}, lies "
                     f"{abs(o['offset_dex']):.2f} dex {where} the model (z = {o['z']:+.1f}"
                     f"{'' if o['fitted'] else '; not fitted'})")
    return lines
