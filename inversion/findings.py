"""What the volatility diagram is read for, computed rather than judged by eye.

- the refractory lithophile level relative to CI (weighted mean of log10 N, with its
  standard error inflated by the scatter when the scatter exceeds the stated errors);
- the volatility slope of the lithophile moderately/highly volatile elements against
  that of the chalcophile and siderophile ones (weighted least squares of log10 N on Tc,
  each with its standard error, and the difference);
- the highly siderophile excess as a late-accretion mass;
- the elements that sit off the fitted trend (|z| > 3), with size and direction.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

import components

from .fit import FitResult
from .model import Problem

__all__ = ["findings", "weighted_slope", "OUTLIER_Z"]

OUTLIER_Z = 3.0


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


def findings(p: Problem, result: FitResult, *, planet_mass_kg: float | None = None
             ) -> dict[str, Any]:
    """Quantitative readings of the diagram for one fit (JSON-ready dict)."""
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
            "basis": f"CI- and {p.reference}-normalised, weighted mean"}
    vol = obs & np.isin(cos, ["moderately_volatile", "highly_volatile"])
    slopes = {}
    groups = {"lithophile": vol & (geo == "lithophile"),
              "chalcophile_siderophile": vol & np.isin(
                  geo, ["chalcophile", "siderophile_moderate", "siderophile_highly"])}
    for name, mask in groups.items():
        if mask.sum() >= 3:
            s, se = weighted_slope(p.tc[mask], p.y_all[mask], p.sigma_all[mask])
            slopes[name] = {"slope_dex_per_1000K": 1000 * s, "uncertainty": 1000 * se,
                            "n": int(mask.sum()),
                            "elements": [e for e, k in zip(p.elements, mask, strict=True) if k]}
    if len(slopes) == 2:
        a, b = slopes["lithophile"], slopes["chalcophile_siderophile"]
        d = a["slope_dex_per_1000K"] - b["slope_dex_per_1000K"]
        se = math.hypot(a["uncertainty"], b["uncertainty"])
        slopes["difference"] = {"value": d, "uncertainty": se,
                                "significance_sigma": abs(d) / se if se > 0 else float("inf")}
    out["volatility_slopes"] = slopes
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
        out["off_trend"] = [
            {"element": e, "z": float(z), "offset_dex": float(o - m),
             "direction": "above model" if z > 0 else "below model", "fitted": bool(f)}
            for e, z, o, m, f in zip(off["element"], off["z"], off["observed"], off["model"],
                                     off["fitted"], strict=True)]
    return out


def summary_lines(f: dict[str, Any]) -> list[str]:
    """Human-readable lines for the CLI."""
    lines = []
    if "refractory_lithophile_level" in f:
        r = f["refractory_lithophile_level"]
        lines.append(f"refractory lithophiles: {r['factor']:.3f} x CI "
                     f"({r['log10_relative_to_CI']:+.3f} +- {r['uncertainty_dex']:.3f} dex)")
    s = f.get("volatility_slopes", {})
    for k in ("lithophile", "chalcophile_siderophile"):
        if k in s:
            lines.append(f"volatility slope, {k}: {s[k]['slope_dex_per_1000K']:.2f} +- "
                         f"{s[k]['uncertainty']:.2f} dex per 1000 K (n={s[k]['n']})")
    if "difference" in s:
        d = s["difference"]
        lines.append(f"slope difference: {d['value']:.2f} +- {d['uncertainty']:.2f} "
                     f"({d['significance_sigma']:.1f} sigma)")
    if "late_accretion" in f:
        la = f["late_accretion"]
        extra = f", {la['mass_kg']:.3g} kg" if "mass_kg" in la else ""
        lines.append(f"late accretion: {100 * la['fraction_of_mantle']:.3f}% of the mantle "
                     f"({100 * la['fraction_of_planet']:.3f}% of the planet{extra})")
    for o in f.get("off_trend", []):
        lines.append(f"off trend: {o['element']} {o['direction']} by {o['offset_dex']:+.2f} dex "
                     f"(z = {o['z']:+.1f})")
    return lines
