"""Exact solvers for the mixing sub-problem: least squares on the simplex with linear
inequality constraints, vectorised over many problems at once.

The sub-problem (docs/model.md section 9) is, for each of B problems,

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

__all__ = ["solve_batch", "solve_quadratic_batch", "solve_cvxpy", "QPSolution",
           "MAX_ENUMERATED_VARIABLES"]

#: Above this many variables, :func:`solve_batch` is not used (enumeration grows as 2^m).
MAX_ENUMERATED_VARIABLES = 7
_FEAS_TOL = 1e-9


class QPSolution:
    """Solutions of a batch: ``u`` (B, m), ``objective`` (B,), ``feasible`` (B,) bool."""

    __slots__ = ("u", "objective", "feasible", "active")

    def __init__(self, u: np.ndarray, objective: np.ndarray, feasible: np.ndarray,
                 active: np.ndarray | None = None) -> None:
        self.u = u
        self.objective = objective
        self.feasible = feasible
        #: (B, m + g) bool: the active inequalities (``u >= 0`` rows first) at the answer
        self.active = active


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
    H = np.einsum("bni,bnj->bij", A, A)
    c = np.einsum("bni,bn->bi", A, b)
    const = np.einsum("bn,bn->b", b, b)
    m = A.shape[2]
    g = 0 if G is None else np.shape(G)[1]
    # active-set iterations from the bare simplex, enumeration where they do not verify
    return solve_quadratic_batch(H, c, const, G, h,
                                 guess=np.zeros((A.shape[0], m + g), dtype=bool))


def _kkt_fixed(H: np.ndarray, c: np.ndarray, Gall: np.ndarray, hall: np.ndarray,
               act: np.ndarray, hscale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Solve the equality-constrained problem on the active sets ``act`` (B, g) of every
    row at once; inactive rows get a zero multiplier. Returns u (B, m), multipliers
    (B, g)."""
    B, m, _ = H.shape
    g = Gall.shape[1]
    k = m + 1 + g
    K = np.zeros((B, k, k))
    rhs = np.zeros((B, k))
    K[:, :m, :m] = H
    K[:, m, :m] = 1.0
    K[:, :m, m] = 1.0
    rows = Gall * act[:, :, None]
    K[:, m + 1:, :m] = rows
    K[:, :m, m + 1:] = np.swapaxes(rows, 1, 2)
    diag = np.arange(m + 1, k)
    K[:, diag, diag] = np.where(act, -1e-13 / hscale[:, None], 1.0)
    K[:, m, m] = -1e-13 / hscale
    rhs[:, :m] = c
    rhs[:, m] = 1.0
    rhs[:, m + 1:] = np.where(act, hall, 0.0)
    try:
        sol = np.linalg.solve(K, rhs[..., None])[..., 0]
    except np.linalg.LinAlgError:
        sol = np.einsum("bij,bj->bi", np.linalg.pinv(K), rhs)
    return sol[:, :m], sol[:, m + 1:]


def _active_set_iterations(H, c, Gall, hall, act, hscale, max_iter: int = 40):
    """Primal-dual active-set iterations from ``act``: add the most violated inequality,
    drop the most negative multiplier, until the KKT conditions hold (exact optimum of
    the convex problem) or ``max_iter`` is reached. Returns u, active sets and the mask
    of rows whose KKT conditions were verified."""
    B = H.shape[0]
    act = act.copy()
    done = np.zeros(B, dtype=bool)
    u = np.full((B, H.shape[1]), np.nan)
    for _ in range(max_iter):
        todo = np.flatnonzero(~done)
        if todo.size == 0:
            break
        uu, mu = _kkt_fixed(H[todo], c[todo], Gall[todo], hall[todo], act[todo],
                            hscale[todo])
        slack = np.einsum("bgm,bm->bg", Gall[todo], uu) - hall[todo]
        viol = np.where(act[todo], -np.inf, slack)
        worst = np.argmax(viol, axis=1)
        vmax = viol[np.arange(todo.size), worst]
        mneg = np.where(act[todo], mu, np.inf)
        least = np.argmin(mneg, axis=1)
        mmin = mneg[np.arange(todo.size), least]
        primal_ok = ~(vmax > _FEAS_TOL * (1.0 + np.abs(hall[todo]).max(axis=1)))
        dual_ok = ~(mmin < -1e-10 * (1.0 + np.abs(mu).max(axis=1)))
        fin = np.all(np.isfinite(uu), axis=1)
        ok = primal_ok & dual_ok & fin & (np.abs(uu.sum(axis=1) - 1.0) < 1e-7)
        u[todo[ok]] = uu[ok]
        done[todo[ok]] = True
        add = ~primal_ok & fin
        drop = primal_ok & ~dual_ok & fin
        act[todo[add], worst[add]] = True
        act[todo[drop], least[drop]] = False
        stuck = ~fin
        done[todo[stuck]] = False
        if stuck.all():
            break
    return u, act, done


def solve_quadratic_batch(H: np.ndarray, c: np.ndarray, const: np.ndarray,
                          G: np.ndarray | None = None, h: np.ndarray | None = None, *,
                          guess: np.ndarray | None = None) -> QPSolution:
    """Exact minimisation of ``u' H u - 2 c' u + const`` on the simplex with ``G u <= h``.

    The same active-set enumeration as :func:`solve_batch`, for a quadratic form given
    directly (``H`` symmetric positive semi-definite, shape (B, m, m); ``c`` (B, m);
    ``const`` (B,)). The joint solver of :mod:`inversion.solver` uses it for its
    linearised steps, whose quadratic form is not built from a plain design matrix.

    ``guess`` (B, m + g) bool, an active set per row (for instance the one of the
    previous step), starts primal-dual active-set iterations; a row whose KKT
    conditions (primal and dual feasibility) are verified has its exact optimum (the
    problem is convex). Rows that are not verified, and every row without a guess, are
    solved by enumeration (up to :data:`MAX_ENUMERATED_VARIABLES` variables).
    """
    H = np.asarray(H, dtype=float)
    c = np.asarray(c, dtype=float)
    const = np.asarray(const, dtype=float)
    B, m, _ = H.shape
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
    hscale = np.trace(H, axis1=1, axis2=2) / m + 1e-300
    ridge = 1e-12 * hscale
    H = H + ridge[:, None, None] * np.eye(m)
    H_plain = H - ridge[:, None, None] * np.eye(m)
    active = np.zeros((B, n_ineq), dtype=bool)
    verified_u = np.full((B, m), np.nan)
    verified = np.zeros(B, dtype=bool)
    if guess is not None:
        verified_u, active, verified = _active_set_iterations(
            H, c, Gall, hall, np.asarray(guess, bool), hscale)
        if verified.all() or m > MAX_ENUMERATED_VARIABLES:
            return _finish(verified_u, verified, H_plain, c, const, active)
        rest = np.flatnonzero(~verified)
        sub = solve_quadratic_batch(H_plain[rest], c[rest], const[rest], G[rest], h[rest])
        verified_u[rest] = sub.u
        active[rest] = sub.active
        verified[rest] = sub.feasible
        return _finish(verified_u, verified, H_plain, c, const, active)
    if m > MAX_ENUMERATED_VARIABLES:
        raise SolverError(f"{m} variables is too many for enumeration; use solve_cvxpy")

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
            # exactly dependent rows (e.g. an all-zero constraint, or active rows that
            # repeat the simplex sum): those systems are solved in the least-squares
            # sense (contradictory sets then fail the checks below), the rest directly
            sing = ~(np.abs(np.linalg.det(K)) > 0)
            sol = np.empty_like(rhs)
            if (~sing).any():
                sol[~sing] = np.linalg.solve(K[~sing], rhs[~sing][..., None])[..., 0]
            sol[sing] = np.einsum("xij,xj->xi", np.linalg.pinv(K[sing]), rhs[sing])
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
    slack = np.einsum("bgm,bm->bg", Gall, np.nan_to_num(best_u)) - hall
    active = feasible[:, None] & (np.abs(slack) < 1e-7)
    return _finish(best_u, feasible, H_plain, c, const, active)


def _finish(u: np.ndarray, feasible: np.ndarray, H: np.ndarray, c: np.ndarray,
            const: np.ndarray, active: np.ndarray) -> QPSolution:
    u = np.where(feasible[:, None], np.clip(u, 0.0, None), np.nan)
    u = u / np.where(feasible, u.sum(axis=1), 1.0)[:, None]
    uu = np.nan_to_num(u)
    obj = np.einsum("bi,bij,bj->b", uu, H, uu) - 2 * np.einsum("bi,bi->b", uu, c) + const
    obj = np.where(feasible, obj, np.inf)
    return QPSolution(u, obj, feasible, active)


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
