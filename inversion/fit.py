"""Convex inversion: the exact optimum of the whole problem, with its certificate.

For fixed volatility parameters, core-to-mantle mass ratio k and linearisation point, the
final silicate's ratios to R are linear in the weights u = (building blocks, late
component) on the simplex, so the weighted least-squares problem with the isotope
windows, the late-accretion bound and the core-iron budget is a quadratic program
(:mod:`inversion.qp`). That sub-problem, profiled over a grid of the volatility
parameters, gives the starting points; each start is then polished on the whole
problem, all parameters together, by :func:`inversion.solver.polish` (which accounts for
how the weights move k, and refines the volatility parameters continuously). Every
answer carries an optimality record: the starts, how many reached the best value, and
the first-order (KKT) residual at the answer. Screening starts every mixture from the
optima of its subsets as well, so a mixture never fits worse than one it contains.
"""

from __future__ import annotations

import itertools
import math
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

from .case import Case
from .model import Problem, compile_problem, forward, lam_from_v, relative_log_retained
from .planet import assemble, planet_table
from .qp import MAX_ENUMERATED_VARIABLES, solve_batch, solve_cvxpy
from .solver import (
    JointSettings,
    curvature,
    first_order_residual,
    forward_from,
    isotope_prediction,
    isotope_sigma,
    kink_boxes,
    polish,
    row_problem,
)
from .volatility import get_form

__all__ = ["FitResult", "fit", "fit_problem", "screen", "Ranking", "FitSettings",
           "SCREEN_SETTINGS", "STATUS_OPTIMAL", "STATUS_UNVERIFIED", "STATUS_INFEASIBLE",
           "STATUSES"]

#: Statuses of a fit: ``optimal`` (at least two distinct starts reached the best chi2
#: within the agreement tolerance and the first-order residual is below its tolerance),
#: ``optimal_unverified`` (the best value found, but the starts disagree or the
#: first-order residual is large), ``infeasible`` (no parameter set meets the
#: constraints; ``reasons`` names them).
STATUS_OPTIMAL = "optimal"
STATUS_UNVERIFIED = "optimal_unverified"
STATUS_INFEASIBLE = "infeasible"
STATUSES = (STATUS_OPTIMAL, STATUS_UNVERIFIED, STATUS_INFEASIBLE)
_LN10 = math.log(10.0)


@dataclass(frozen=True)
class FitSettings:
    """Settings of the convex inversion (recorded in every result)."""

    passes: int = 3
    starts: int = 4
    agreement: float = 1e-5
    kkt_tolerance: float = 1e-4
    cmf_range: tuple[float, float] | None = None
    intervals: bool = True
    #: the polish stops a start when two accepted steps in a row lower chi2 by less than
    #: 1e-9 relative (far below the agreement tolerance and the 1e-3 of the reference
    #: checks; a stricter stop only adds iterations that crawl along a flat valley)
    joint: JointSettings = field(default_factory=lambda: JointSettings(tolerance=1e-9))
    solver: str = ("profile: k-frozen Gauss-Newton with the exact simplex QP (primal "
                   "active-set method from a feasible vertex, edge midpoint or centre, a "
                   "warm primal-dual start where a guess exists, enumeration of the active "
                   "sets where neither verifies; cvxpy/CLARABEL above 7 variables) on the "
                   "volatility grid; polish: Levenberg-Marquardt on all parameters "
                   "(Jacobian through the core fixed point: residual columns analytic, the "
                   "core state by the implicit-function derivative of one core step per "
                   "column, constraint columns by differences; exact QP steps, "
                   "restoration of infeasible starts); kinked forms: 10 iterations "
                   "on the whole box, then the best four answers of each hypothesis "
                   "within 20% of its best on the smooth piece of T0 they lie in, moving "
                   "to the next piece while they end on its edge")

    @property
    def record(self) -> dict[str, Any]:
        """JSON-ready view (``fit.json`` provenance)."""
        return {"method": self.solver, "profile_passes": self.passes,
                "polished_starts": self.starts, "agreement_relative": self.agreement,
                "kkt_tolerance_chi2": self.kkt_tolerance,
                "cmf_range": list(self.cmf_range) if self.cmf_range else None,
                "joint": {"max_iterations": self.joint.max_iterations,
                          "tolerance": self.joint.tolerance,
                          "constraint_tolerance": self.joint.constraint_tolerance,
                          "fd_step_weights": self.joint.fd_step_weights,
                          "fd_step_volatility_of_span": self.joint.fd_step_volatility}}


#: Screening uses the same solver as ``planetmix fit`` (the ranking must not depend on
#: coarser settings); only the curvature intervals are left out.
SCREEN_SETTINGS = FitSettings(intervals=False)


@dataclass(frozen=True)
class FitResult:
    """Result of one hypothesis' convex fit.

    ``status`` is ``optimal`` or ``infeasible``; when infeasible, ``reasons`` names the
    constraints that cannot be met and the estimates are NaN.
    """

    status: str
    components: tuple[str, ...]
    weights: dict[str, float]
    mass_fractions: dict[str, float]
    volatility_form: str
    volatility: dict[str, float]
    late_weight: float
    late_accretion_fraction: float
    core_mass_fraction: float
    k: float
    chi2: float
    n_elements: int
    n_params: int
    residuals: pd.DataFrame
    predicted: pd.Series
    reasons: tuple[str, ...] = ()
    isotopes: dict[str, float] = field(default_factory=dict)
    settings: FitSettings = field(default_factory=FitSettings)
    optimality: dict[str, Any] = field(default_factory=dict)
    intervals: dict[str, Any] = field(default_factory=dict)
    u: tuple[float, ...] = ()

    @property
    def feasible(self) -> bool:
        """Whether the fit found parameters that meet every constraint."""
        return self.status != STATUS_INFEASIBLE

    @property
    def aic(self) -> float:
        """Akaike information criterion, chi2 + 2p."""
        return self.chi2 + 2 * self.n_params

    @property
    def bic(self) -> float:
        """Bayesian information criterion, chi2 + p ln n."""
        return self.chi2 + self.n_params * math.log(max(self.n_elements, 1))

    def to_dataframe(self) -> pd.DataFrame:
        """One-row tidy view of the estimates."""
        return pd.DataFrame([self.row()])

    def row(self) -> dict[str, Any]:
        """The estimates as one row of a table (:meth:`to_dataframe`, the ranking)."""
        row: dict[str, Any] = {"components": "+".join(self.components), "status": self.status,
                               "chi2": self.chi2, "aic": self.aic, "bic": self.bic,
                               "n_elements": self.n_elements, "n_params": self.n_params,
                               "late_accretion_fraction": self.late_accretion_fraction,
                               "core_mass_fraction": self.core_mass_fraction}
        row.update({f"w_{k}": v for k, v in self.weights.items()})
        row.update({f"{self.volatility_form}_{k}": v for k, v in self.volatility.items()})
        o = self.optimality
        row.update({"optimality_starts": o.get("starts"),
                    "optimality_agreeing": o.get("agreeing"),
                    "optimality_kkt_residual": o.get("kkt_residual"),
                    "optimality_worst_start_chi2": o.get("worst_start_chi2")})
        return row


def _design(p: Problem, vol: np.ndarray, k: np.ndarray, D_Fe: np.ndarray,
            M_s_prev: np.ndarray, u_prev: np.ndarray | None = None
            ) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """Mantle-ratio design (B, n, m) and inequality rows (B, g, m) <= h for fixed k."""
    B = vol.shape[0]
    logr = relative_log_retained(p, vol)
    rr = 10.0 ** logr  # (B, n)
    Q3 = p.Q if p.Q.ndim == 3 else p.Q[None]
    Qr = Q3 * rr[:, None, :]  # (B, K, n)
    fe = p.fe_index
    D = np.broadcast_to(p.D, (B, p.D.size)).copy()
    if p.mantle_Fe is None:
        D[:, fe] = D_Fe
    mant = Qr / (1.0 + D[:, None, :] * k[:, None, None])  # (B, K, n)
    rows: list[np.ndarray] = []
    hs: list[np.ndarray] = []
    names: list[str] = []
    K = p.Q.shape[-2]
    has_late = p.late_name is not None
    if p.mantle_Fe is not None:
        F = p.mantle_Fe
        f = p.oxide_factor
        mask = np.ones(p.Q.shape[-1])
        mask[fe] = 0.0
        s1 = (mant * (f * mask)[None, None, :]).sum(axis=2)  # (B, K)
        Ms = s1 / (1.0 - f[fe] * F)
        mant[:, :, fe] = F * Ms
        core_fe = Qr[:, :, fe] - F * Ms  # core iron per unit weight (B, K)
        rows.append(-core_fe)
        hs.append(np.zeros(B))
        names.append("iron budget (mantle FeO needs more iron than the building blocks hold)")
    A = np.swapaxes(mant, 1, 2)  # (B, n, K)
    if has_late:
        A = np.concatenate([A, np.broadcast_to(p.q_late[None, :, None], (B, A.shape[1], 1))],
                           axis=2)
        # late weight v bounded by the maximum late-accretion fraction
        lam_max = p.late_max_fraction
        c_R = 1.0 / M_s_prev
        v_max = lam_max * p.c_late_R / ((1.0 - lam_max) * c_R + lam_max * p.c_late_R)
        rows = [np.concatenate([r, np.zeros((B, 1))], axis=1) for r in rows]
        e = np.zeros((B, K + 1))
        e[:, K] = 1.0
        rows.append(e)
        hs.append(v_max)
        names.append(f"late-accretion fraction <= {lam_max}")
    for iso in p.isotopes:
        late_cols = ([np.full((B, 1), iso["q_late"])], [np.full((B, 1), iso["eps_late"])])
        qc = np.concatenate([np.broadcast_to(iso["q_carrier"], (B, K))]
                            + (late_cols[0] if has_late else []), axis=1)
        eps = np.concatenate([np.broadcast_to(iso["eps"], (B, K))]
                             + (late_cols[1] if has_late else []), axis=1)
        sig = (np.full(B, float(iso["sigma"])) if u_prev is None
               else isotope_sigma(p, iso, u_prev))
        win = (p.isotope_window_sigma * sig)[:, None]
        up = qc * (eps - iso["value"] - win)
        lo = qc * (eps - iso["value"] + win)
        rows.append(up)
        hs.append(np.zeros(B))
        names.append(f"{iso['name']} upper window")
        rows.append(-lo)
        hs.append(np.zeros(B))
        names.append(f"{iso['name']} lower window")
    G = np.stack(rows, axis=1) if rows else np.zeros((B, 0, A.shape[2]))
    h = np.stack(hs, axis=1) if hs else np.zeros((B, 0))
    return A, G, h, names


def _solve(A: np.ndarray, b: np.ndarray, G: np.ndarray, h: np.ndarray,
           guess: np.ndarray | None = None):
    if A.shape[2] <= MAX_ENUMERATED_VARIABLES:
        return solve_batch(A, b, G, h, guess=guess)
    return solve_cvxpy(A, b, G, h)


def _profile_points(p: Problem, vol: np.ndarray, passes: int) -> dict[str, np.ndarray]:
    """Gauss-Newton passes for a batch of volatility parameter sets."""
    B = vol.shape[0]
    K = p.Q.shape[-2]
    fi = p.fit_index
    y_ratio = p.y + np.log10(p.q_ci[fi])  # observed log10 ratio to R
    m0 = np.broadcast_to(10.0 ** y_ratio, (B, fi.size)).copy()
    k = np.full(B, 0.5)
    D_Fe = np.full(B, 10 ** (-(p.dIW or 0.0) / 2.0))
    M_s = np.full(B, 4.5)
    best = {"chi2": np.full(B, np.inf), "u": np.full((B, K + (p.late_name is not None)),
                                                     np.nan)}
    feasible_any = np.zeros(B, dtype=bool)
    u_prev = np.full((B, K + (p.late_name is not None)), 1.0 / (K + 1))
    state = None
    guess = None
    for _ in range(passes):
        A, G, h, _names = _design(p, vol, k, D_Fe, M_s, u_prev)
        Af = A[:, fi, :]
        scale = 1.0 / (m0 * _LN10 * p.sigma[None, :])
        Aw = Af * scale[:, :, None]
        bw = (y_ratio[None, :] - np.log10(m0) + 1.0 / _LN10) / p.sigma[None, :]
        # the active sets of the previous pass (a nearby problem) start this one
        sol = _solve(Aw, bw, G, h, guess)
        ok = sol.feasible
        if sol.active is not None:
            guess = sol.active & ok[:, None]
        feasible_any |= ok
        u = np.where(ok[:, None], sol.u, 1.0 / sol.u.shape[1])
        u_prev = u
        w = u[:, :K]
        sw = w.sum(axis=1, keepdims=True)
        w = np.where(sw > 0, w / np.where(sw > 0, sw, 1.0), 1.0 / K)
        v = u[:, K] if p.late_name is not None else np.zeros(B)
        # the core split does not depend on the late veneer: one forward pass, then mix
        # (its fixed point started from the previous pass's)
        fwd = forward_from(p, w, vol, state)
        state = fwd["state"]
        ratio = (1.0 - v)[:, None] * fwd["mantle"][:, fi] + v[:, None] * p.q_late[None, fi]
        with np.errstate(divide="ignore", invalid="ignore"):
            model = np.log10(ratio / p.q_ci[None, fi])
        chi2 = (((model - p.y[None, :]) / p.sigma[None, :]) ** 2).sum(axis=1)
        chi2 = np.where(ok & np.isfinite(chi2), chi2, np.inf)
        better = chi2 < best["chi2"]
        best["chi2"] = np.where(better, chi2, best["chi2"])
        best["u"][better] = u[better]
        k = fwd["k"]
        D_Fe = np.where(np.isfinite(fwd["D_Fe"]), fwd["D_Fe"], D_Fe)
        M_s = fwd["M_s"]
        m0 = np.clip(ratio, 1e-30, None)
        m0 = np.where(ok[:, None], m0, 10.0 ** y_ratio[None, :])
    best["feasible"] = feasible_any
    return best


def _grid(form: str) -> np.ndarray:
    """Profile grid of the volatility parameters. The power form's grid is laid in its
    exponent and pivot (Tc at which depletion starts, 900-1700 K) rather than in (a, b),
    whose rectangular grid puts most points where the pivot lies outside every element's
    condensation temperature (no depletion, a flat misfit)."""
    f = get_form(form)
    if form == "power":
        a = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.5, 8.0])
        pivot = np.linspace(900.0, 1700.0, 9)
        pts = np.array([(x, -x * np.log10(t)) for x in a for t in pivot])
        return np.clip(pts, f.lower, f.upper)
    return np.array(list(itertools.product(*f.grid)), dtype=float)


#: Up to this many building blocks, a fit starts from the optima of all its sub-mixtures.
NESTED_MAX = 6
#: Rows (hypotheses x profile points) solved together in one batch.
_BATCH_ROWS = 3000


def _profile_grid(p: Problem, subsets: list[tuple[str, ...]], settings: FitSettings
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The k-frozen profile of many equal-size hypotheses on the volatility grid.

    Returns the grid (G, p), chi2 (H, G) and weights (H, G, m) of every hypothesis.
    """
    grid = _grid(p.volatility_form)
    G = grid.shape[0]
    H = len(subsets)
    per = max(1, _BATCH_ROWS // G)
    chis, us = [], []
    for s in range(0, H, per):
        sub = subsets[s:s + per]
        ps = p.stacked(sub, G)
        r = _profile_points(ps, np.tile(grid, (len(sub), 1)), settings.passes)
        chis.append(r["chi2"].reshape(len(sub), G))
        us.append(r["u"].reshape(len(sub), G, -1))
    return grid, np.concatenate(chis), np.concatenate(us)


def _distinct_starts(grid: np.ndarray, chi: np.ndarray, n: int, form: str,
                     informative: np.ndarray) -> list[int]:
    """Indices of the ``n`` best grid points that lie apart from each other (normalised
    distance > 0.1 of the parameter box), best first; only ``informative`` points (where
    the volatility form depletes some fitted elements more than others: elsewhere the
    misfit is flat in the volatility parameters and a start cannot move)."""
    f = get_form(form)
    span = np.array(f.upper) - np.array(f.lower)
    order = [j for j in np.argsort(chi) if np.isfinite(chi[j]) and informative[j]]
    out: list[int] = []
    for j in order:
        if all(np.linalg.norm((grid[j] - grid[i]) / span) > 0.1 for i in out):
            out.append(int(j))
        if len(out) == n:
            break
    return out


#: Iterations of the first polish stage for the kinked forms (the second stage, on the
#: smooth pieces of the misfit, converges from there).
STAGE1_ITERATIONS = 10
#: Answers within this relative distance of their hypothesis' best after the first stage
#: go on to the smooth-piece stage; the others keep the first stage's value.
STAGE2_NEAR = 0.2
#: At most this many answers per hypothesis (its best) go on to the smooth-piece stage.
STAGE2_STARTS = 4
#: Rounds of the smooth-piece stage: an answer that ends on an inner edge of its boxes
#: is polished again on the pieces around that edge.
STAGE2_ROUNDS = 6
#: Smooth pieces on each side of an answer's own piece in the second stage (0: its own
#: piece, and both pieces when it sits on a corner).
STAGE2_REACH = 0


def _smooth_piece_stages(p: Problem, ps: Problem, rows: np.ndarray, n_hyp: int,
                         pol: dict[str, np.ndarray], box_lo: np.ndarray,
                         box_hi: np.ndarray, settings: FitSettings) -> None:
    """Second stage of the kinked forms, in place: every answer near its hypothesis' best
    is polished again on the smooth pieces of the misfit around it (boxes of T0 between
    consecutive condensation temperatures, :func:`inversion.solver.kink_boxes`), so a
    corner optimum is reached exactly, as a bound of a smooth piece. An answer that ends
    on an inner edge of the boxes it was given (the optimum may lie beyond) is polished
    again on the pieces around that edge, up to :data:`STAGE2_ROUNDS` rounds; one still
    moving after the last round is certified on the form's whole box."""
    form = get_form(p.volatility_form)
    j_t0 = form.params.index("T0")
    B = rows.size
    hyp_best = np.full(n_hyp, np.inf)
    np.minimum.at(hyp_best, rows, pol["chi2"])
    near = np.isfinite(pol["chi2"]) & (pol["chi2"] <= hyp_best[rows] * (1.0 + STAGE2_NEAR)
                                       + 1e-6)
    # at most STAGE2_STARTS answers per hypothesis, the best first
    order = np.lexsort((pol["chi2"], rows))
    rank = np.empty(B, dtype=int)
    first = np.searchsorted(rows[order], rows[order], side="left")
    rank[order] = np.arange(B) - first
    near &= rank < STAGE2_STARTS
    todo = np.flatnonzero(near)
    for _ in range(STAGE2_ROUNDS):
        if todo.size == 0:
            break
        src, lo2, hi2 = [], [], []
        for i in todo:
            for lo, hi in kink_boxes(ps, pol["TH"][i], reach=STAGE2_REACH):
                src.append(i)
                lo2.append(lo)
                hi2.append(hi)
        src_a = np.array(src)
        lo2a, hi2a = np.array(lo2), np.array(hi2)
        pol2 = polish(row_problem(ps, src_a), pol["U"][src_a],
                      np.clip(pol["TH"][src_a], lo2a, hi2a), settings=settings.joint,
                      cmf_range=settings.cmf_range, bounds=(lo2a, hi2a))
        # the union of the boxes each answer was given: its outer T0 edges
        outer_lo = np.full(B, np.inf)
        outer_hi = np.full(B, -np.inf)
        np.minimum.at(outer_lo, src_a, lo2a[:, j_t0])
        np.maximum.at(outer_hi, src_a, hi2a[:, j_t0])
        moved = np.zeros(B, dtype=bool)
        for q, i in enumerate(src_a):
            if pol2["chi2"][q] <= pol["chi2"][i]:
                moved[i] |= pol2["chi2"][q] < pol["chi2"][i]
                pol["chi2"][i] = pol2["chi2"][q]
                pol["U"][i] = pol2["U"][q]
                pol["TH"][i] = pol2["TH"][q]
                box_lo[i], box_hi[i] = lo2a[q], hi2a[q]
            pol["iterations"][i] += pol2["iterations"][q]
        t0 = pol["TH"][:, j_t0]
        span = form.upper[j_t0] - form.lower[j_t0]
        eps = 1e-6 * span
        on_edge = (((np.abs(t0 - outer_lo) <= eps) & (outer_lo > form.lower[j_t0] + eps))
                   | ((np.abs(t0 - outer_hi) <= eps) & (outer_hi < form.upper[j_t0] - eps)))
        todo = np.flatnonzero(on_edge & moved)
    # answers still walking after the last round: certify them on the form's whole box
    # (a bound of a box they were given is no constraint of the problem)
    box_lo[todo] = np.array(form.lower, float)
    box_hi[todo] = np.array(form.upper, float)


@dataclass(frozen=True)
class _Start:
    """A starting point of the joint polish and where it came from."""

    u: np.ndarray
    theta: np.ndarray
    origin: str


#: two starts are independent when their starting points are more than this apart in
#: the scaled parameter space (largest difference over the weights, the late weight and
#: the volatility parameters as fractions of their box span); far above rounding noise
#: (1e-12) and far below the spacing of the profile grid and of the weight-space starts
START_SEPARATION = 1e-3
INDEPENDENCE_RULE = ("optimal needs >= 2 independent starts (starting points more than "
                     "independence_distance apart, scaled max-norm: weights, late weight, "
                     "volatility parameters / box span) reaching the best chi2 within "
                     "agreement_tolerance_relative; starts closer than that count as one")


def _independent_starts(U: np.ndarray, TH: np.ndarray, lo: np.ndarray, hi: np.ndarray
                        ) -> list[np.ndarray]:
    """Group starts whose starting points lie within :data:`START_SEPARATION` of each
    other (single linkage in the scaled max-norm, so the grouping does not depend on
    the order of the starts or on rounding noise); returns the row indices of each group,
    groups ordered by their first row."""
    span = np.where(hi > lo, hi - lo, 1.0)
    X = np.concatenate([U, (TH - lo) / span], axis=1)
    n = len(X)
    close = np.abs(X[:, None, :] - X[None, :, :]).max(axis=2) <= START_SEPARATION
    label = -np.ones(n, dtype=int)
    for i in range(n):
        if label[i] >= 0:
            continue
        label[i] = i
        stack = [i]
        while stack:
            j = stack.pop()
            for k in np.flatnonzero(close[j] & (label < 0)):
                label[k] = i
                stack.append(int(k))
    return [np.flatnonzero(label == g) for g in np.unique(label)]


def _solve_group(p: Problem, subsets: list[tuple[str, ...]], settings: FitSettings,
                 extra: list[list[_Start]] | None = None) -> list[dict[str, Any]]:
    """Solve equal-size hypotheses: profile starts plus ``extra`` starts, polished jointly.

    Returns one record per hypothesis: the best (u, theta, chi2), the optimality record
    and the feasibility of the profile.
    """
    grid, chi, us = _profile_grid(p, subsets, settings)
    logr = relative_log_retained(p, grid)[:, p.fit_index]
    informative = (logr.max(axis=1) - logr.min(axis=1)) > 1e-3
    starts: list[list[_Start]] = []
    for h in range(len(subsets)):
        picks = _distinct_starts(grid, chi[h], settings.starts, p.volatility_form,
                                 informative)
        mine = [_Start(us[h, j], grid[j], f"profile grid point {grid[j].round(6).tolist()}")
                for j in picks]
        # weight-space starts: each block dominant, and the centre, at the best profile
        # point (the profile's frozen core can hide a basin in which another block
        # dominates; restoration moves an infeasible one onto the constraints)
        K = len(subsets[h])
        if K > 1 and picks:
            m = us.shape[2]
            th = grid[picks[0]]
            for k in range(K):
                u = np.zeros(m)
                u[:K] = 0.2 / K
                u[k] += 0.8
                mine.append(_Start(u, th, f"{subsets[h][k]} dominant"))
            u = np.zeros(m)
            u[:K] = 1.0 / K
            mine.append(_Start(u, th, "equal weights"))
        if extra is not None:
            mine += extra[h]
        if len(mine) > 1:
            # a start that repeats another (within START_SEPARATION) is not polished
            form_h = get_form(p.volatility_form)
            groups = _independent_starts(np.array([s.u for s in mine]),
                                         np.array([s.theta for s in mine]),
                                         np.array(form_h.lower, float),
                                         np.array(form_h.upper, float))
            mine = [mine[int(g[0])] for g in groups]
        starts.append(mine)
    rows = np.array([h for h, st in enumerate(starts) for _ in st], dtype=int)
    if rows.size == 0:
        return [{"feasible": False} for _ in subsets]
    ps = row_problem(p.stacked(subsets, 1), rows)
    U0 = np.array([s.u for st in starts for s in st])
    T0 = np.array([s.theta for st in starts for s in st])
    form = get_form(p.volatility_form)
    kinked = "T0" in form.params
    # the misfit of a kinked form is only piecewise smooth in T0: there the first stage
    # only brings each start near its basin (the iterations that crawl along a kink are
    # left to the second stage, which converges on the smooth pieces)
    joint1 = (replace(settings.joint, max_iterations=min(settings.joint.max_iterations,
                                                          STAGE1_ITERATIONS))
              if kinked else settings.joint)
    pol = polish(ps, U0, T0, settings=joint1, cmf_range=settings.cmf_range)
    B = rows.size
    box_lo = np.broadcast_to(np.array(form.lower, float), (B, len(form.params))).copy()
    box_hi = np.broadcast_to(np.array(form.upper, float), (B, len(form.params))).copy()
    if kinked:
        _smooth_piece_stages(p, ps, rows, len(subsets), pol, box_lo, box_hi, settings)
    out: list[dict[str, Any]] = []
    best_rows = []
    for h in range(len(subsets)):
        sel = np.flatnonzero(rows == h)
        if sel.size == 0 or not np.isfinite(pol["chi2"][sel]).any():
            out.append({"feasible": False})
            best_rows.append(-1)
            continue
        c = pol["chi2"][sel]
        j = sel[int(np.argmin(c))]
        best = float(pol["chi2"][j])
        # independent starts only (two subsets' optima, or an extra start and a grid
        # start, can be the same point): see :func:`_independent_starts`
        groups = _independent_starts(U0[sel], T0[sel], np.array(form.lower, float),
                                      np.array(form.upper, float))
        tol = settings.agreement * max(abs(best), 1.0)
        # each independent start's value: the best of the starts that share its point
        values = [float(np.min(np.where(np.isfinite(pol["chi2"][sel[g]]),
                                        pol["chi2"][sel[g]], np.inf))) for g in groups]
        distinct = [int(sel[g[0]]) for g in groups]
        agree = [v for v in values if np.isfinite(v) and v - best <= tol]
        finite = [v for v in values if np.isfinite(v)]
        out.append({
            "feasible": True, "u": pol["U"][j].copy(), "theta": pol["TH"][j].copy(),
            "chi2": best, "box": (box_lo[j], box_hi[j]),
            "optimality": {
                "starts": len(distinct), "agreeing": len(agree),
                "agreement_tolerance_relative": settings.agreement,
                "independence_rule": INDEPENDENCE_RULE,
                "independence_distance": START_SEPARATION,
                "worst_start_chi2": float(max(finite)) if finite else None,
                "best_start": starts[h][int(np.argmin(c))].origin,
                "start_chi2": [float(pol["start_chi2"][i]) for i in distinct],
                "final_chi2": values,
                "iterations": int(pol["iterations"][j])}})
        best_rows.append(j)
    # first-order residual at every answer, in one batch, on the smooth piece it lies in
    done = [h for h, j in enumerate(best_rows) if j >= 0]
    if done:
        idx = np.array([best_rows[h] for h in done])
        kkt = first_order_residual(row_problem(ps, idx), pol["U"][idx], pol["TH"][idx],
                                   settings=settings.joint, cmf_range=settings.cmf_range,
                                   bounds=(box_lo[idx], box_hi[idx]))
        for h, val in zip(done, kkt, strict=True):
            rec = out[h]["optimality"]
            rec["kkt_residual"] = float(val)
            rec["kkt_tolerance"] = settings.kkt_tolerance
            ok = rec["agreeing"] >= 2 and np.isfinite(val) and val <= settings.kkt_tolerance
            rec["status"] = STATUS_OPTIMAL if ok else STATUS_UNVERIFIED
    return out


def _result(p: Problem, rec: dict[str, Any], settings: FitSettings,
            fwd: dict[str, np.ndarray] | None = None) -> FitResult:
    """Build the FitResult of one hypothesis from its solved record (``fwd``: the
    forward model at the answer, with its late-accretion fraction, when computed for
    several hypotheses at once by :func:`_answers_forward`)."""
    form = p.volatility_form
    K = p.Q.shape[0]
    has_late = p.late_name is not None
    n_params = (K - 1) + len(get_form(form).params) + (1 if has_late else 0)
    names = list(p.components)
    if not rec.get("feasible"):
        return _infeasible(p, n_params, settings)
    u = rec["u"]
    vol = rec["theta"]
    w = u[:K] / u[:K].sum()
    v = float(u[K]) if has_late else 0.0
    if fwd is None:
        fwd0 = forward(p, w[None], vol[None], 0.0)
        lam = float(lam_from_v(p, np.array([v]), fwd0["M_s"])[0]) if has_late else 0.0
        fwd = forward(p, w[None], vol[None], lam)
    lam = float(fwd["lam"][0]) if has_late else 0.0
    resid = _residual_table(p, fwd)
    iso_pred = _isotope_prediction(p, w, v)
    intervals = _intervals(p, u, vol, settings, rec.get("box")) if settings.intervals else {}
    return FitResult(
        status=rec["optimality"]["status"], components=tuple(names),
        weights=dict(zip(names, map(float, w), strict=True)),
        mass_fractions=dict(zip(names, map(float, fwd["x"][0]), strict=True)),
        volatility_form=form,
        volatility=dict(zip(get_form(form).params, map(float, vol), strict=True)),
        late_weight=v, late_accretion_fraction=lam,
        core_mass_fraction=float(fwd["cmf"][0]), k=float(fwd["k"][0]),
        chi2=float(rec["chi2"]), n_elements=p.n_fit, n_params=n_params, residuals=resid,
        predicted=pd.Series(fwd["log10N"][0], index=list(p.elements), name="log10N"),
        isotopes=iso_pred, settings=settings, optimality=rec["optimality"],
        intervals=intervals, u=tuple(map(float, u)),
    )


def _derived(p: Problem, U: np.ndarray, TH: np.ndarray) -> dict[str, np.ndarray]:
    """Reported quantities as functions of (u, theta), batched (for the delta method)."""
    K = p.Q.shape[-2]
    has_late = p.late_name is not None
    sK = U[:, :K].sum(axis=1, keepdims=True)
    w = U[:, :K] / sK
    fwd = forward(p, w, TH, 0.0)
    out: dict[str, np.ndarray] = {}
    for k, c in enumerate(p.components):
        out[f"weight:{c}"] = w[:, k]
        out[f"mass_fraction:{c}"] = fwd["x"][:, k]
    for j, n in enumerate(get_form(p.volatility_form).params):
        out[f"volatility:{n}"] = TH[:, j]
    if has_late:
        out["late_accretion_fraction"] = lam_from_v(p, U[:, K], fwd["M_s"])
    out["core_mass_fraction"] = fwd["cmf"]
    return out


def _intervals(p: Problem, u: np.ndarray, th: np.ndarray, settings: FitSettings,
               box: tuple[np.ndarray, np.ndarray] | None = None) -> dict[str, Any]:
    """Laplace intervals of the reported quantities at the optimum (delta method)."""
    cov, _J, N, active = curvature(p, u, th, settings=settings.joint,
                                   cmf_range=settings.cmf_range, bounds=box)
    z = np.concatenate([u, th])
    n = z.size
    f = get_form(p.volatility_form)
    span = np.concatenate([np.ones(u.size), np.array(f.upper) - np.array(f.lower)])
    h = 1e-6 * span
    Zp = np.repeat(z[None], 2 * n, axis=0)
    Zp[np.arange(n), np.arange(n)] += h
    Zp[n + np.arange(n), np.arange(n)] -= h
    m = u.size
    d_plus = _derived(p, Zp[:n, :m], Zp[:n, m:])
    d_minus = _derived(p, Zp[n:, :m], Zp[n:, m:])
    d0 = _derived(p, u[None], th[None])
    bounded = {"weight", "mass_fraction", "late_accretion_fraction", "core_mass_fraction"}
    out: dict[str, Any] = {}
    for key, val in d0.items():
        g = (d_plus[key] - d_minus[key]) / (2 * h)
        var = float(g @ cov @ g)
        sd = math.sqrt(max(var, 0.0))
        v = float(val[0])
        lo, hi = v - 1.959964 * sd, v + 1.959964 * sd
        if key.split(":")[0] in bounded:
            lo, hi = max(lo, 0.0), min(hi, 1.0)
        out[key] = {"value": v, "sd": sd, "p2.5": lo, "p97.5": hi}
    return {"method": "Laplace approximation: Gauss-Newton curvature of chi2 on the free "
                      "directions of the active constraints, delta method for derived "
                      "quantities; 95% = value +- 1.96 sd, clipped to the physical range; "
                      "not rescaled by chi2 per degree of freedom; a quantity fixed by an "
                      "active constraint has zero width",
            "free_directions": int(N.shape[1]), "active_constraints": active,
            "quantities": out}


def fit_problem(p: Problem, settings: FitSettings | None = None, *,
                starts: list[FitResult] | None = None) -> FitResult:
    """Fit one hypothesis (the problem's building blocks plus its late component).

    Starts: the best distinct points of the volatility profile; with up to
    :data:`NESTED_MAX` blocks the optima of every sub-mixture one block smaller (solved
    in turn from theirs, so the fit is never worse than any mixture it contains), with
    more blocks the optimum of each block alone; and ``starts`` (earlier fits of the same
    problem or of its sub-mixtures).

    Parameters
    ----------
    p : Problem
        A compiled problem (see :func:`inversion.model.compile_problem`).
    settings : FitSettings, optional
    starts : list of FitResult, optional
        Further starting points (their weights are mapped by block name; blocks they
        lack start at zero).

    Returns
    -------
    FitResult
    """
    settings = settings or FitSettings()
    names = list(p.components)
    extra: list[_Start] = []
    if 1 < len(names) <= NESTED_MAX:
        sub_settings = replace(settings, intervals=False)
        solved = {f.components: f for f in _solve_nested(p, len(names) - 1, sub_settings)}
        extra = _subset_starts(p, tuple(names), solved)
    elif len(names) > NESTED_MAX:
        singles = _solve_group(p, [(c,) for c in names], replace(settings, starts=2))
        for c, rec in zip(names, singles, strict=True):
            if rec.get("feasible"):
                extra.append(_Start(_pad(p, (c,), rec["u"]), rec["theta"],
                                    f"optimum of {c} alone"))
    for r in starts or []:
        if r.feasible and r.u:
            extra.append(_Start(_pad(p, r.components, np.array(r.u)),
                                np.array(list(r.volatility.values())),
                                f"earlier fit of {'+'.join(r.components)}"))
    rec = _solve_group(p, [tuple(names)], settings, [extra])[0]
    return _result(p, rec, settings)


def refit(p: Problem, previous: FitResult, settings: FitSettings | None = None) -> FitResult:
    """Fit ``p`` from the volatility-profile starts and ``previous`` (a fit of the same
    blocks on a nearby problem, e.g. other partition coefficients), without the
    sub-mixture starts of :func:`fit_problem` (a warm refit; :mod:`inversion.conditions`)."""
    settings = settings or FitSettings()
    extra = []
    if previous.feasible and previous.u:
        extra.append(_Start(_pad(p, previous.components, np.array(previous.u)),
                            np.array(list(previous.volatility.values())),
                            f"earlier fit of {'+'.join(previous.components)}"))
    rec = _solve_group(p, [tuple(p.components)], settings, [extra])[0]
    return _result(p, rec, settings)


def _pad(p: Problem, sub: tuple[str, ...], u_sub: np.ndarray) -> np.ndarray:
    """Weights of a sub-mixture as a starting point of ``p`` (absent blocks at zero)."""
    K = len(p.components)
    has_late = p.late_name is not None
    u = np.zeros(K + has_late)
    for j, c in enumerate(sub):
        u[p.components.index(c)] = u_sub[j]
    if has_late:
        u[K] = u_sub[len(sub)]
    return u


def _fit_group(args: tuple[Problem, list[tuple[str, ...]], FitSettings,
                           list[list[_Start]]]) -> list[FitResult]:
    """Fit equal-size hypotheses together (one worker's share of a screen)."""
    p, subsets, settings, extra = args
    recs = _solve_group(p, subsets, settings, extra)
    fwds = _answers_forward(p, subsets, recs)
    return [_result(p.subset(s), rec, settings, fw)
            for s, rec, fw in zip(subsets, recs, fwds, strict=True)]


def _answers_forward(p: Problem, subsets: list[tuple[str, ...]],
                     recs: list[dict[str, Any]]) -> list[dict[str, np.ndarray] | None]:
    """The forward model at the answers of equal-size hypotheses, in one batch (the
    late-accretion fraction from the late weight at the answer's core split)."""
    ok = [h for h, rec in enumerate(recs) if rec.get("feasible")]
    out: list[dict[str, np.ndarray] | None] = [None] * len(recs)
    if not ok:
        return out
    K = len(subsets[0])
    ps = p.stacked([subsets[h] for h in ok], 1)
    U = np.array([recs[h]["u"] for h in ok])
    TH = np.array([recs[h]["theta"] for h in ok])
    W = U[:, :K] / U[:, :K].sum(axis=1, keepdims=True)
    lam = np.zeros(len(ok))
    if p.late_name is not None:
        lam = lam_from_v(p, U[:, K], forward(ps, W, TH, 0.0)["M_s"])
    fwd = forward(ps, W, TH, lam)
    for i, h in enumerate(ok):
        out[h] = {key: val[i:i + 1] for key, val in fwd.items()}
    return out


def _isotope_prediction(p: Problem, w: np.ndarray, v: float) -> dict[str, float]:
    """Isotope anomalies of the answer (:func:`inversion.solver.isotope_prediction`)."""
    U = np.concatenate([(1.0 - v) * w, [v]] if p.late_name is not None else [w])[None]
    return {iso["name"]: float(isotope_prediction(p, iso, U)[0]) for iso in p.isotopes}


def _residual_table(p: Problem, fwd: dict[str, np.ndarray], row: int = 0) -> pd.DataFrame:
    fitted = np.zeros(len(p.elements), dtype=bool)
    fitted[p.fit_index] = True
    z = (p.y_all - fwd["log10N"][row]) / p.sigma_all
    with np.errstate(invalid="ignore"):
        flag = np.where(~np.isfinite(p.y_all), "not observed",
                        np.where(np.abs(z) > 3, np.where(z > 0, "above model", "below model"),
                                 ""))
    return pd.DataFrame({
        "element": list(p.elements),
        "tc50": p.tc,
        "observed": p.y_all,
        "model": fwd["log10N"][row],
        "sigma": p.sigma_all,
        "z": z,
        "fitted": fitted,
        "flag": flag.astype(object),
    })


def _isotope_reasons_at_weights(p: Problem) -> list[str]:
    """Isotope systems whose window, widened by the end-members' uncertainties at the
    weights themselves, no mixture of the hypothesis meets, alone or together.

    The margin ``g_j(u) = n sigma_eff,j(u) - |eps_j(u) - eps_obs,j|`` is maximised over
    the mixtures (SLSQP from every vertex and the centre; the late component within its
    cap): a system whose best margin is negative fails alone; when each holds alone, the
    best of ``min_j g_j`` says whether they fail together.
    """
    from scipy.optimize import minimize

    from .isotopes import late_weight_bound, reachable_intervals

    K = len(p.components)
    late = p.late_name is not None
    m = K + late
    v_max = late_weight_bound(p) if late else 0.0
    bounds = [(0.0, 1.0)] * K + ([(0.0, v_max)] if late else [])
    starts = [np.eye(m)[k] for k in range(K)] + [np.full(m, 1.0 / m)]
    if late:
        starts = [np.clip(s_, 0, None) for s_ in starts]
        for st in starts:
            st[K] = min(st[K], v_max)
            st[:K] *= (1 - st[K]) / max(st[:K].sum(), 1e-12)

    def margin(u: np.ndarray, iso: dict) -> float:
        U = np.clip(u, 0.0, None)[None]
        eps = isotope_prediction(p, iso, U)[0]
        win = p.isotope_window_sigma * isotope_sigma(p, iso, U)[0]
        return float(win - abs(eps - iso["value"]))

    def best(fun) -> float:
        out = -np.inf
        for st in starts:
            r = minimize(lambda u: -fun(u), st, method="SLSQP", bounds=bounds,
                         constraints=[{"type": "eq", "fun": lambda u: u.sum() - 1.0}])
            u = np.clip(r.x, 0.0, None)
            u = u / u.sum()
            out = max(out, fun(u), fun(st))
        return out

    ranges = reachable_intervals(p)
    blocks = "+".join(p.components)
    reasons = []
    for iso in p.isotopes:
        if best(lambda u, iso=iso: margin(u, iso)) < 0:
            lo, hi = ranges[iso["name"]]
            reasons.append(f"{iso['name']}: observed {iso['value']:.3g} +- "
                           f"{p.isotope_window_sigma:g} sigma_eff; no mixture of {blocks} "
                           f"meets its window widened at its own weights (reachable "
                           f"[{lo:.2f}, {hi:.2f}])")
    if not reasons and len(p.isotopes) > 1:
        if best(lambda u: min(margin(u, iso) for iso in p.isotopes)) < 0:
            names = " and ".join(d["name"] for d in p.isotopes)
            reasons.append(f"{names}: each can be met alone, not together, by a mixture of "
                           f"{blocks} (windows widened at the weights)")
    return reasons


def _infeasible(p: Problem, n_params: int, settings: FitSettings) -> FitResult:
    """The infeasible answer with its reasons: each isotope system that no mixture of the
    hypothesis reaches on its own, the combinations that fail only together
    (:func:`inversion.isotopes.feasibility_report`, with the late component at its real
    cap), and the iron budget where it is what fails."""
    from .isotopes import feasibility_report

    grid = _grid(p.volatility_form)
    rep = feasibility_report(p) if p.isotopes else None
    reasons = list(rep.messages) if rep is not None else []
    if not reasons:
        base = replace(p, isotopes=())
        feas = _profile_points(base, grid, 1)["feasible"]
        if not feas.any():
            reasons.append("iron budget: the mantle FeO needs more iron than the building "
                           "blocks hold, at every volatility grid point")
        elif p.isotopes:
            vol = grid[int(np.flatnonzero(feas)[0])][None]
            fwd = forward(p, np.full((1, len(p.components)), 1.0 / len(p.components)), vol)
            _A, G, h, names = _design(base, vol, fwd["k"], fwd["D_Fe"], fwd["M_s"])
            iron = [i for i, n in enumerate(names) if n.startswith("iron budget")]
            if iron:
                rep2 = feasibility_report(p, extra=(G[0, iron], h[0, iron]))
                reasons.extend(rep2.messages)
        if p.isotopes and not reasons:
            reasons.extend(_isotope_reasons_at_weights(p))
        if settings.cmf_range is not None and not reasons:
            reasons.append(f"core mass fraction range {list(settings.cmf_range)}: no start "
                           "of the solver met it together with the other constraints")
        if not reasons:
            reasons.append("the isotope windows (widened by the end-members' uncertainties "
                           "at the weights) cannot be met together with the iron budget")
    nan = float("nan")
    names = list(p.components)
    return FitResult(
        status=STATUS_INFEASIBLE, components=tuple(names), weights=dict.fromkeys(names, nan),
        mass_fractions=dict.fromkeys(names, nan), volatility_form=p.volatility_form,
        volatility=dict.fromkeys(get_form(p.volatility_form).params, nan), late_weight=nan,
        late_accretion_fraction=nan, core_mass_fraction=nan, k=nan, chi2=float("inf"),
        n_elements=p.n_fit, n_params=n_params,
        residuals=pd.DataFrame(columns=["element", "tc50", "observed", "model", "sigma", "z",
                                        "fitted", "flag"]),
        predicted=pd.Series(dtype=float), reasons=tuple(reasons), settings=settings,
    )


def fit(case: Case, settings: FitSettings | None = None) -> FitResult:
    """Fit a case with all its candidates together (the case's ``[fit] cmf_range`` is
    imposed unless ``settings`` say otherwise).

    Examples
    --------
    See ``case_studies/`` and the README for complete runs.
    """
    settings = settings or FitSettings(cmf_range=case.cmf_range)
    return fit_problem(compile_problem(case), settings)


@dataclass(frozen=True)
class Ranking:
    """Every hypothesis of a screen, best first (``table``), and their fits."""

    table: pd.DataFrame
    fits: tuple[FitResult, ...]

    def to_dataframe(self) -> pd.DataFrame:
        """The ranking table."""
        return self.table.copy()


#: Hypotheses per screening job (at most): the polish of a job runs as one batch, and
#: each batch ends in a tail of a few slow rows that costs per call, not per row, so
#: fewer, larger jobs are faster; the jobs of a size are split evenly over the workers.
SCREEN_JOB_HYPOTHESES = 256


def _solve_nested(p: Problem, max_size: int, settings: FitSettings, *, workers: int = 1,
                  progress: bool = False) -> list[FitResult]:
    """Every mixture of up to ``max_size`` of the problem's blocks, smallest first, each
    started from its own profile and from the optima of its subsets one block smaller."""
    from tqdm.auto import tqdm

    names = list(p.components)
    total = sum(math.comb(len(names), r) for r in range(1, max_size + 1))
    bar = tqdm(total=total, desc="hypotheses", disable=not progress, unit="fit")
    fits: list[FitResult] = []
    solved: dict[tuple[str, ...], FitResult] = {}
    chunk = SCREEN_JOB_HYPOTHESES
    ex = ProcessPoolExecutor(max_workers=workers) if workers > 1 else None
    try:
        for r in range(1, max_size + 1):
            subs = list(itertools.combinations(names, r))
            extra = [_subset_starts(p, s, solved) for s in subs]
            # equal shares, a multiple of the workers (no worker idles at the end)
            n_jobs = max(1, math.ceil(len(subs) / chunk))
            if ex is not None:
                n_jobs = workers * max(1, math.ceil(n_jobs / workers))
                n_jobs = min(n_jobs, len(subs))
            cuts = np.linspace(0, len(subs), n_jobs + 1).round().astype(int)
            jobs = [(p, subs[a:b], settings, extra[a:b])
                    for a, b in zip(cuts[:-1], cuts[1:], strict=True) if b > a]
            results = ex.map(_fit_group, jobs) if ex is not None else map(_fit_group, jobs)
            for res in results:
                for f in res:
                    solved[f.components] = f
                fits.extend(res)
                bar.update(len(res))
    finally:
        if ex is not None:
            ex.shutdown()
        bar.close()
    return fits


def _subset_starts(p: Problem, s: tuple[str, ...], solved: dict[tuple[str, ...], FitResult]
                   ) -> list[_Start]:
    """Starts of mixture ``s`` from the solved optima of its subsets one block smaller."""
    out = []
    for sub in itertools.combinations(s, len(s) - 1):
        f = solved.get(sub)
        if f is not None and f.feasible and f.u:
            out.append(_Start(_pad(p.subset(s), sub, np.array(f.u)),
                              np.array(list(f.volatility.values())),
                              f"optimum of {'+'.join(sub)}"))
    return out


def screen(case: Case, *, settings: FitSettings | None = None, workers: int = 1,
           progress: bool = False) -> Ranking:
    """Fit every subset of the candidates up to ``case.max_mixture_size`` and rank them.

    Every hypothesis uses the same elements (those all candidates hold), so chi2, AIC
    and BIC compare across hypotheses. Hypotheses are solved by size, smallest first;
    each starts from its own profile and from the optima of all its subsets one block
    smaller (each a feasible point of it), so chi2 of a mixture is never above that of
    a mixture it contains. Hypotheses of equal size are solved together, stacked on the
    batch axis.

    Parameters
    ----------
    case : Case
    settings : FitSettings, optional
        Defaults to :data:`SCREEN_SETTINGS` (the fit's solver, without intervals).
    workers : int
        Processes to use (1 = in this process).
    progress : bool
        Show a progress bar on standard error.
    """
    settings = settings or replace(SCREEN_SETTINGS, cmf_range=case.cmf_range)
    p = compile_problem(case)
    fits = _solve_nested(p, case.max_mixture_size, settings, workers=workers,
                         progress=progress)
    table = pd.DataFrame([f.row() for f in fits])
    table["n_components"] = [len(f.components) for f in fits]
    table["reasons"] = ["; ".join(f.reasons) for f in fits]
    order = np.lexsort((table["chi2"].to_numpy(), table["bic"].to_numpy()))
    table = table.iloc[order].reset_index(drop=True)
    table.insert(0, "rank", np.arange(1, len(table) + 1))
    fits_sorted = tuple(fits[i] for i in order)
    return Ranking(table=table, fits=fits_sorted)


def forward_of(p: Problem, result: FitResult) -> dict[str, np.ndarray]:
    """The forward model evaluated at a fit's estimates (batch of one)."""
    w = np.array([result.weights[c] for c in p.components])[None]
    vol = np.array(list(result.volatility.values()))[None]
    return forward(p, w, vol, result.late_accretion_fraction)


def planet_of(p: Problem, result: FitResult) -> pd.DataFrame:
    """Planet table (mantle, core, bulk, ratios) of a fit result."""
    return planet_table(p, assemble(p, forward_of(p, result)))
