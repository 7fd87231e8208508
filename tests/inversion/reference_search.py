"""An independent global-search reference for the convex fit (used by the tests only).

It shares nothing with :mod:`inversion.solver` or :mod:`inversion.fit` but the forward
model: scipy's ``differential_evolution`` over every parameter (building-block weights
as normalised positive variables, the late-accretion fraction, the volatility
parameters in their form's box), with the constraints as a penalty, then a local polish
with SLSQP on the simplex weights from the best point found.

chi2 weighs each residual by the observed variance plus the first-order variance of the
mixture from the blocks' end-member spreads (``Q_sigma_dex``), as the model states.
Constraints, as stated by the model: isotope windows
``|eps_planet - eps_obs| <= window * sigma_eff`` (eps_planet the carrier-weighted mass
balance of the blocks and the late component, sigma_eff the observed 1-sigma widened by
the end-members' spreads), the iron budget (core Fe >= 0) when the mantle FeO is given,
and the core-mass-fraction range when one is set.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import differential_evolution, minimize

from inversion.model import Problem, forward
from inversion.volatility import get_form

PENALTY = 1e6


@dataclass
class Reference:
    """Best point of the reference search."""

    chi2: float
    weights: np.ndarray
    lam: float
    volatility: np.ndarray
    violation: float
    cmf: float


def _isotope_gaps(p: Problem, w: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Window slack per isotope (B, n_iso): positive means the window is met."""
    B = w.shape[0]
    has_late = p.late_name is not None
    out = []
    for iso in p.isotopes:
        q = np.asarray(iso["q_carrier"], float)
        eps = np.asarray(iso["eps"], float)
        s = np.asarray(iso.get("eps_sigma", np.zeros_like(q)), float)
        r = np.asarray(iso.get("q_carrier_rel_sigma", np.zeros_like(q)), float)
        u = (1.0 - v)[:, None] * w
        if has_late:
            u = np.concatenate([u, v[:, None]], axis=1)
            q = np.append(q, iso["q_late"])
            eps = np.append(eps, iso["eps_late"])
            s = np.append(s, iso.get("eps_sigma_late", 0.0))
            r = np.append(r, iso.get("q_carrier_rel_sigma_late", 0.0))
        uq = u * q
        phi = uq / uq.sum(axis=1, keepdims=True)
        mix = (phi * eps).sum(axis=1)
        var = iso["sigma"] ** 2
        if "eps_sigma" in iso:
            var = var + (phi ** 2 * (s ** 2 + r ** 2 * (eps - mix[:, None]) ** 2)).sum(axis=1)
        out.append(p.isotope_window_sigma * np.sqrt(var) - np.abs(mix - iso["value"]))
    return np.stack(out, axis=1) if out else np.zeros((B, 0))


def evaluate(p: Problem, w: np.ndarray, lam: np.ndarray, vol: np.ndarray,
             cmf_range: tuple[float, float] | None = None
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """chi2 (B,), constraint slacks (B, g) (>= 0 is feasible) and CMF (B,)."""
    fwd = forward(p, w, vol, lam)
    fi = p.fit_index
    var = np.broadcast_to(p.sigma ** 2, (w.shape[0], fi.size))
    if p.Q_sigma_dex is not None:
        # end-member spread of each block's log10 ratio, first order in the mixture
        wq = w[:, :, None] * p.Q[None, :, fi]
        with np.errstate(divide="ignore", invalid="ignore"):
            rel = np.sqrt(((wq * p.Q_sigma_dex[None, :, fi]) ** 2).sum(axis=1)) / wq.sum(axis=1)
        var = var + np.nan_to_num(rel) ** 2
    chi2 = ((fwd["log10N"][:, fi] - p.y) ** 2 / var).sum(axis=1)
    slack = [_isotope_gaps(p, w, fwd["v"])]
    if p.mantle_Fe is not None:
        slack.append(fwd["core"][:, p.fe_index][:, None])
    if cmf_range is not None:
        slack.append(np.stack([fwd["cmf"] - cmf_range[0], cmf_range[1] - fwd["cmf"]], axis=1))
    g = np.concatenate(slack, axis=1)
    chi2 = np.where(np.isfinite(chi2), chi2, 1e12)
    g = np.where(np.isfinite(g), g, -1e3)
    return chi2, g, fwd["cmf"]


def _unpack(p: Problem, X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    K = len(p.components)
    z = np.clip(X[:, :K], 0.0, None) + 1e-12
    return z / z.sum(axis=1, keepdims=True), X[:, K], X[:, K + 1:]


def reference_fit(p: Problem, *, cmf_range: tuple[float, float] | None = None,
                  seed: int = 0, maxiter: int = 300, popsize: int = 30) -> Reference:
    """Global search (differential evolution + SLSQP polish) for the minimum chi2.

    Parameters
    ----------
    p : Problem
    cmf_range : (float, float), optional
        Core-mass-fraction bounds.
    seed : int
    maxiter, popsize : int
        Differential-evolution budget.

    Returns
    -------
    Reference
    """
    K = len(p.components)
    form = get_form(p.volatility_form)
    lam_hi = p.late_max_fraction if p.late_name is not None else 0.0
    bounds = ([(0.0, 1.0)] * K + [(0.0, lam_hi)]
              + list(zip(form.lower, form.upper, strict=True)))

    def objective(Xt: np.ndarray) -> np.ndarray:
        X = np.atleast_2d(Xt.T)
        w, lam, vol = _unpack(p, X)
        chi2, g, _ = evaluate(p, w, lam, vol, cmf_range)
        return chi2 + PENALTY * (np.clip(-g, 0.0, None) ** 2).sum(axis=1) \
            + 1e3 * np.clip(-g, 0.0, None).sum(axis=1)

    de = differential_evolution(objective, bounds, seed=seed, maxiter=maxiter,
                                popsize=popsize, tol=1e-10, vectorized=True, polish=False,
                                updating="deferred", init="sobol")
    # candidate polish starts: the DE answer plus the best distinct population members
    pop = de.population
    energies = de.population_energies
    order = np.argsort(energies)[:4]
    starts = [de.x] + [pop[i] for i in order]
    best: Reference | None = None
    lo = np.array([b[0] for b in bounds[K:]])
    hi = np.array([b[1] for b in bounds[K:]])
    span = np.where(hi > lo, hi - lo, 1.0)
    for x0 in starts:
        w0, l0, v0 = _unpack(p, x0[None])
        y0 = np.concatenate([w0[0], (np.r_[l0, v0[0]] - lo) / span])

        def split(y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
            th = lo + np.asarray(y[K:]) * span
            return (np.clip(y[None, :K], 0.0, None), th[None, :1].ravel(), th[None, 1:])

        def fun(y: np.ndarray) -> float:
            w, lam, vol = split(y)
            return float(evaluate(p, w, lam, vol, cmf_range)[0][0])

        def cons(y: np.ndarray) -> np.ndarray:
            w, lam, vol = split(y)
            return evaluate(p, w, lam, vol, cmf_range)[1][0]

        constraints = [{"type": "eq", "fun": lambda y: np.sum(y[:K]) - 1.0}]
        if cons(y0).size:
            constraints.append({"type": "ineq", "fun": cons})
        # a parameter whose box is a point (no late component) stays fixed
        ybounds = [(0.0, 1.0)] * K + [(0.0, 1.0 if h > lo_ else 0.0)
                                      for lo_, h in zip(lo, hi, strict=True)]
        res = minimize(fun, y0, method="SLSQP", bounds=ybounds,
                       constraints=constraints, options={"maxiter": 500, "ftol": 1e-12})
        for y in (res.x, y0):
            w, lam, vol = split(y)
            w = w / w.sum()
            chi2, g, cmf = evaluate(p, w, lam, vol, cmf_range)
            viol = float(np.clip(-g, 0.0, None).max(initial=0.0))
            if viol > 1e-7:
                continue
            if best is None or chi2[0] < best.chi2:
                best = Reference(float(chi2[0]), w[0], float(lam[0]), vol[0], viol,
                                 float(cmf[0]))
    if best is None:
        w, lam, vol = _unpack(p, de.x[None])
        chi2, g, cmf = evaluate(p, w, lam, vol, cmf_range)
        best = Reference(np.inf, w[0], float(lam[0]), vol[0],
                         float(np.clip(-g, 0.0, None).max(initial=0.0)), float(cmf[0]))
    return best
