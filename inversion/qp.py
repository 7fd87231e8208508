"""Exact solvers for the mixing sub-problem: least squares on the simplex with linear
inequality constraints, vectorised over many problems at once.

The sub-problem (MODEL.md section 9) is, for each of B problems,

    minimise ||A u - b||^2  subject to  sum(u) = 1,  u >= 0,  G u <= h.

:func:`solve_batch` solves it exactly by active-set enumeration: the optimum of a convex
quadratic program is the solution of the equality-constrained problem on its own active
set, so solving the KKT system for every admissible active set and keeping the best
feasible candidate returns the global optimum. With a handful of variables (building
blocks plus the late component) this is a few thousand tiny linear systems, solved
together in one batched LAPACK call, which is far faster than calling a general QP solver
thousands of times. :func:`solve_cvxpy` solves the same problem with cvxpy (compiled
once with Parameters); it serves larger mixtures and checks the exact solver in tests.
"""

from __future__ import annotations

from functools import lru_cache
from itertools import combinations

import numpy as np

from .exceptions import SolverError

__all__ = ["solve_batch", "solve_cvxpy", "QPSolution", "MAX_ENUMERATED_VARIABLES"]

#: Above this many variables, :func:`solve_batch` is not used (enumeration grows as 2^m).
MAX_ENUMERATED_VARIABLES = 7
_FEAS_TOL = 1e-9


class QPSolution:
    """Solutions of a batch: ``u`` (B, m), ``objective`` (B,), ``feasible`` (B,) bool."""

    __slots__ = ("u", "objective", "feasible")

    def __init__(self, u: np.ndarray, objective: np.ndarray, feasible: np.ndarray) -> None:
        self.u = u
        self.objective = objective
        self.feasible = feasible


@lru_cache(maxsize=64)
def _active_sets(n_ineq: int, max_active: int) -> tuple[tuple[int, ...], ...]:
    out: list[tuple[int, ...]] = []
    for s in range(0, max_active + 1):
        out.extend(combinations(range(n_ineq), s))
    return tuple(out)


def solve_batch(A: np.ndarray, b: np.ndarray, G: np.ndarray | None = None,
                h: np.ndarray | None = None) -> QPSolution:
    """Exact least squares on the simplex with inequalities, for a batch of problems.

    Parameters
    ----------
    A : ndarray, shape (B, n, m)
        Weighted design matrices.
    b : ndarray, shape (B, n)
        Weighted targets.
    G : ndarray, shape (B, g, m), optional
        Inequality rows (``G u <= h``), in addition to ``u >= 0``.
    h : ndarray, shape (B, g), optional

    Returns
    -------
    QPSolution
        ``feasible`` is False where no point satisfies the constraints; ``u`` is NaN there.

    Examples
    --------
    >>> import numpy as np
    >>> A = np.eye(2)[None]
    >>> sol = solve_batch(A, np.array([[2.0, 0.0]]))
    >>> sol.u.round(6).tolist()
    [[1.0, 0.0]]
    """
    A = np.asarray(A, dtype=float)
    b = np.asarray(b, dtype=float)
    B, n, m = A.shape
    if m > MAX_ENUMERATED_VARIABLES:
        raise SolverError(f"{m} variables is too many for enumeration; use solve_cvxpy")
    if G is None:
        G = np.zeros((B, 0, m))
        h = np.zeros((B, 0))
    # all inequality rows: -u <= 0, then G u <= h; normalise rows for a scale-free tolerance
    Gall = np.concatenate([np.broadcast_to(-np.eye(m), (B, m, m)), G], axis=1)
    hall = np.concatenate([np.zeros((B, m)), h], axis=1)
    norm = np.linalg.norm(Gall, axis=2)
    norm[norm == 0] = 1.0
    Gall = Gall / norm[:, :, None]
    hall = hall / norm
    n_ineq = Gall.shape[1]
    H = np.einsum("bni,bnj->bij", A, A)
    c = np.einsum("bni,bn->bi", A, b)
    hscale = np.trace(H, axis1=1, axis2=2) / m + 1e-300
    ridge = 1e-12 * hscale
    H = H + ridge[:, None, None] * np.eye(m)
    const = np.einsum("bn,bn->b", b, b)

    best_obj = np.full(B, np.inf)
    best_u = np.full((B, m), np.nan)
    sets = _active_sets(n_ineq, m - 1)
    by_size: dict[int, list[tuple[int, ...]]] = {}
    for s in sets:
        by_size.setdefault(len(s), []).append(s)
    for size, group in by_size.items():
        idx = np.array(group, dtype=int).reshape(len(group), size)
        S = len(group)
        k = m + 1 + size
        K = np.zeros((B, S, k, k))
        rhs = np.zeros((B, S, k))
        K[:, :, :m, :m] = H[:, None]
        K[:, :, m, :m] = 1.0
        K[:, :, :m, m] = 1.0
        rhs[:, :, :m] = c[:, None]
        rhs[:, :, m] = 1.0
        if size:
            rows = Gall[:, idx]  # (B, S, size, m)
            K[:, :, m + 1:, :m] = rows
            K[:, :, :m, m + 1:] = np.swapaxes(rows, 2, 3)
            rhs[:, :, m + 1:] = hall[:, idx]
        # quasi-definite regularisation of the multiplier block keeps every KKT matrix
        # nonsingular (H is positive definite); active sets whose constraints contradict
        # each other then fail the equality check below instead of raising
        diag = np.arange(m, k)
        K[:, :, diag, diag] = -1e-13 / hscale[:, None, None]
        try:
            sol = np.linalg.solve(K, rhs[..., None])[..., 0]
        except np.linalg.LinAlgError:
            # exactly dependent rows (e.g. an all-zero constraint): solve in the
            # least-squares sense; contradictory sets then fail the checks below
            sol = np.einsum("bsij,bsj->bsi", np.linalg.pinv(K), rhs)
        u = sol[:, :, :m]
        eq_ok = np.abs(u.sum(axis=2) - 1.0) < 1e-7
        if size:
            act = np.einsum("bsam,bsm->bsa", Gall[:, idx], u) - hall[:, idx]
            eq_ok &= np.all(np.abs(act) < 1e-7, axis=2)
        slack = np.einsum("bgm,bsm->bsg", Gall, u) - hall[:, None, :]
        feas = eq_ok & np.all(slack <= _FEAS_TOL * (1.0 + np.abs(hall[:, None, :])), axis=2)
        feas &= np.all(np.isfinite(u), axis=2)
        obj = (np.einsum("bsi,bij,bsj->bs", u, H, u) - 2 * np.einsum("bsi,bi->bs", u, c)
               + const[:, None])
        obj = np.where(feas, obj, np.inf)
        j = np.argmin(obj, axis=1)
        cand = obj[np.arange(B), j]
        better = cand < best_obj
        best_obj = np.where(better, cand, best_obj)
        best_u[better] = u[np.arange(B), j][better]
    feasible = np.isfinite(best_obj)
    best_u = np.where(feasible[:, None], np.clip(best_u, 0.0, None), np.nan)
    best_u = best_u / np.where(feasible, best_u.sum(axis=1), 1.0)[:, None]
    resid = np.einsum("bnm,bm->bn", A, np.nan_to_num(best_u)) - b
    obj = np.where(feasible, np.einsum("bn,bn->b", resid, resid), np.inf)
    return QPSolution(best_u, obj, feasible)


class _CvxpyProblem:
    """A cvxpy problem compiled once (DPP) for a given shape and re-solved with new data."""

    def __init__(self, n: int, m: int, g: int) -> None:
        import cvxpy as cp

        self.A = cp.Parameter((n, m))
        self.b = cp.Parameter(n)
        self.u = cp.Variable(m, nonneg=True)
        cons = [cp.sum(self.u) == 1]
        self.G = self.h = None
        if g:
            self.G = cp.Parameter((g, m))
            self.h = cp.Parameter(g)
            cons.append(self.G @ self.u <= self.h)
        self.problem = cp.Problem(cp.Minimize(cp.sum_squares(self.A @ self.u - self.b)), cons)


@lru_cache(maxsize=16)
def _compiled(n: int, m: int, g: int) -> _CvxpyProblem:
    return _CvxpyProblem(n, m, g)


def solve_cvxpy(A: np.ndarray, b: np.ndarray, G: np.ndarray | None = None,
                h: np.ndarray | None = None, *, solver: str = "CLARABEL") -> QPSolution:
    """The same problem as :func:`solve_batch`, solved with cvxpy for each batch member.

    The problem is compiled once per shape with cvxpy Parameters and re-solved.
    """
    import cvxpy as cp

    A = np.asarray(A, dtype=float)
    B, n, m = A.shape
    g = 0 if G is None else G.shape[1]
    prob = _compiled(n, m, g)
    us = np.full((B, m), np.nan)
    obj = np.full(B, np.inf)
    feas = np.zeros(B, dtype=bool)
    for i in range(B):
        prob.A.value = A[i]
        prob.b.value = b[i]
        if g:
            prob.G.value = G[i]
            prob.h.value = h[i]
        try:
            prob.problem.solve(solver=solver)
        except cp.error.SolverError as err:
            raise SolverError(f"cvxpy solver {solver} failed: {err}; try solver='SCS' or "
                              "'OSQP'") from err
        status = prob.problem.status
        if status in (cp.OPTIMAL, cp.OPTIMAL_INACCURATE):
            u = np.clip(prob.u.value, 0, None)
            us[i] = u / u.sum()
            r = A[i] @ us[i] - b[i]
            obj[i] = float(r @ r)
            feas[i] = True
        elif status not in (cp.INFEASIBLE, cp.INFEASIBLE_INACCURATE):
            raise SolverError(f"cvxpy returned status {status}")
    return QPSolution(us, obj, feas)
