"""Exact solvers for the mixing sub-problem: least squares on the simplex with linear
inequality constraints, vectorised over many problems at once.

The sub-problem (docs/model.md section 9) is, for each of B problems,

    minimise ||A u - b||^2  subject to  sum(u) = 1,  u >= 0,  G u <= h.

:func:`solve_quadratic_batch` (and :func:`solve_batch`, for a design matrix) solve it with
a primal active-set method, every row of the batch with its own working set, one batched
LAPACK call per iteration:

1. with a guessed active set (the joint solver passes the previous step's), a few
   primal-dual active-set iterations: solve the KKT system on the guessed set, add the
   most violated inequality or drop the most negative multiplier; a row whose KKT
   conditions hold is done (a warm guess usually verifies at once);
2. every other row: a primal active-set method from a feasible point (the feasible vertex
   or the centre of the simplex with the lowest objective). Each iteration minimises on
   the working set; if the minimiser is reached and every multiplier is >= 0 the row is
   optimal, else the most negative multiplier's constraint leaves the set; otherwise the
   step goes as far as feasibility allows and the blocking constraint enters. The iterate
   stays feasible and the objective never increases, so the method does not cycle on
   non-degenerate problems;
3. rows that neither stage verifies (no feasible vertex or centre, or degenerate problems
   that run out of iterations) are solved by enumeration of the active sets: the optimum
   of a convex QP solves the equality-constrained problem on its own active set, so the
   best feasible KKT solution over all admissible sets is the global optimum.

Every answer of stages 1 and 2 carries a verified KKT certificate (primal feasibility
within :data:`_FEAS_TOL`, multipliers of the active inequalities >= 0 within a relative
1e-10, stationarity by the KKT solve); stage 3 is exact by exhaustion. ``QPSolution.
method`` says which stage answered each row. :func:`solve_cvxpy` solves the same problem
with cvxpy (compiled once with Parameters); it serves larger mixtures and checks the exact
solver in tests.
"""

from __future__ import annotations

from functools import lru_cache
from itertools import combinations

import numpy as np

from .exceptions import SolverError

__all__ = ["solve_batch", "solve_quadratic_batch", "solve_cvxpy", "QPSolution",
           "MAX_ENUMERATED_VARIABLES", "METHOD_WARM", "METHOD_PRIMAL", "METHOD_ENUMERATION",
           "METHOD_NONE"]

#: Above this many variables, :func:`solve_batch` is not used (enumeration grows as 2^m).
MAX_ENUMERATED_VARIABLES = 7
_FEAS_TOL = 1e-9


#: ``QPSolution.method`` codes: which stage answered a row.
METHOD_WARM, METHOD_PRIMAL, METHOD_ENUMERATION, METHOD_NONE = 1, 2, 3, 0


class QPSolution:
    """Solutions of a batch: ``u`` (B, m), ``objective`` (B,), ``feasible`` (B,) bool,
    ``active`` (B, m + g) the active inequalities (``u >= 0`` rows first) and ``method``
    (B,) int: :data:`METHOD_WARM` or :data:`METHOD_PRIMAL` (verified KKT point),
    :data:`METHOD_ENUMERATION` (exhaustive), :data:`METHOD_NONE` (infeasible or
    unsolved)."""

    __slots__ = ("u", "objective", "feasible", "active", "method")

    def __init__(self, u: np.ndarray, objective: np.ndarray, feasible: np.ndarray,
                 active: np.ndarray | None = None, method: np.ndarray | None = None
                 ) -> None:
        self.u = u
        self.objective = objective
        self.feasible = feasible
        self.active = active
        self.method = (np.where(feasible, METHOD_ENUMERATION, METHOD_NONE)
                       if method is None else method)


@lru_cache(maxsize=64)
def _active_sets(n_ineq: int, max_active: int) -> tuple[tuple[int, ...], ...]:
    out: list[tuple[int, ...]] = []
    for s in range(0, max_active + 1):
        out.extend(combinations(range(n_ineq), s))
    return tuple(out)


def solve_batch(A: np.ndarray, b: np.ndarray, G: np.ndarray | None = None,
                h: np.ndarray | None = None, *, guess: np.ndarray | None = None
                ) -> QPSolution:
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
    guess : ndarray of bool, shape (B, m + g), optional
        A guessed active set per row (e.g. ``active`` of a nearby problem's solution),
        as in :func:`solve_quadratic_batch`.

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
    At = np.swapaxes(A, 1, 2)
    H = np.matmul(At, A)
    c = np.matmul(At, b[:, :, None])[:, :, 0]
    const = (b * b).sum(axis=1)
    return solve_quadratic_batch(H, c, const, G, h, guess=guess)


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


def _primal_tol(hall: np.ndarray) -> np.ndarray:
    return _FEAS_TOL * (1.0 + np.abs(hall).max(axis=1))


def _dual_ok(mu: np.ndarray, act: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Whether every active multiplier is >= 0 (relative 1e-10), and the most negative."""
    mneg = np.where(act, mu, np.inf)
    least = np.argmin(mneg, axis=1)
    mmin = mneg[np.arange(mu.shape[0]), least]
    return ~(mmin < -1e-10 * (1.0 + np.abs(mu).max(axis=1))), least


def _active_set_iterations(H, c, Gall, hall, act, hscale, max_iter: int = 12):
    """Primal-dual active-set iterations from ``act``: add the most violated inequality,
    drop the most negative multiplier, until the KKT conditions hold (exact optimum of
    the convex problem) or ``max_iter`` is reached. Returns u, active sets and the mask
    of rows whose KKT conditions were verified. Fast from a good guess, but it can cycle
    from a poor one: those rows go on to :func:`_primal_active_set`."""
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
        primal_ok = ~(vmax > _primal_tol(hall[todo]))
        dual_ok, least = _dual_ok(mu, act[todo])
        fin = np.all(np.isfinite(uu), axis=1)
        ok = primal_ok & dual_ok & fin & (np.abs(uu.sum(axis=1) - 1.0) < 1e-7)
        u[todo[ok]] = uu[ok]
        done[todo[ok]] = True
        add = ~primal_ok & fin
        drop = primal_ok & ~dual_ok & fin
        act[todo[add], worst[add]] = True
        act[todo[drop], least[drop]] = False
        if not fin.any():
            break
    return u, act, done


def _feasible_start(H, c, Gall, hall):
    """A feasible point per row: of the vertices of the simplex, the midpoints of its
    edges and its centre, the feasible one with the lowest objective, with its working
    set (the ``u >= 0`` rows at zero). Returns u (B, m), working sets (B, g) and the mask
    of rows that have one."""
    B, m, _ = H.shape
    cand = _start_points(m)  # (S, m)
    slack = np.einsum("bgm,jm->bjg", Gall, cand) - hall[:, None, :]
    feas = np.all(slack <= _primal_tol(hall)[:, None, None], axis=2)  # (B, S)
    obj = np.einsum("ji,bik,jk->bj", cand, H, cand) - 2 * np.einsum("ji,bi->bj", cand, c)
    obj = np.where(feas, obj, np.inf)
    j = np.argmin(obj, axis=1)
    has = feas[np.arange(B), j]
    u = cand[j]
    W = np.zeros(Gall.shape[:2], dtype=bool)
    W[:, :m] = (u == 0.0) & has[:, None]
    return u, W, has


@lru_cache(maxsize=16)
def _start_points_cached(m: int) -> bytes:
    pts = [np.eye(m)[j] for j in range(m)]
    for j, k in combinations(range(m), 2):
        x = np.zeros(m)
        x[[j, k]] = 0.5
        pts.append(x)
    pts.append(np.full(m, 1.0 / m))
    return np.array(pts).tobytes()


def _start_points(m: int) -> np.ndarray:
    return np.frombuffer(_start_points_cached(m)).reshape(-1, m)


def _primal_active_set(H, c, Gall, hall, u, W, hscale, max_iter: int):
    """Primal active-set iterations from the feasible points ``u`` with working sets
    ``W`` (linearly independent rows, satisfied with equality at ``u``). Returns u, the
    working sets and the mask of rows that reached a verified KKT point."""
    B, m, _ = H.shape
    u = u.copy()
    W = W.copy()
    done = np.zeros(B, dtype=bool)
    live = np.ones(B, dtype=bool)
    for _ in range(max_iter):
        todo = np.flatnonzero(live & ~done)
        if todo.size == 0:
            break
        Ht, ct, Gt, ht, Wt, ut = H[todo], c[todo], Gall[todo], hall[todo], W[todo], u[todo]
        us, mu = _kkt_fixed(Ht, ct, Gt, ht, Wt, hscale[todo])
        fin = np.all(np.isfinite(us), axis=1)
        live[todo[~fin]] = False
        p = np.where(fin[:, None], us - ut, 0.0)
        # the step's decrease of the objective u'Hu - 2c'u (exact for a quadratic)
        q_now = np.einsum("bi,bij,bj->b", ut, Ht, ut) - 2 * np.einsum("bi,bi->b", ut, ct)
        q_new = np.einsum("bi,bij,bj->b", us, Ht, us) - 2 * np.einsum("bi,bi->b", us, ct)
        us_slack = np.einsum("bgm,bm->bg", Gt, us) - ht
        us_feas = np.all(us_slack <= _primal_tol(ht)[:, None], axis=1)
        flat = (np.abs(p).max(axis=1) <= 1e-12) | (
            (q_now - q_new <= 1e-13 * (hscale[todo] + np.abs(q_now))) & us_feas)
        stationary = fin & flat
        dual_ok, least = _dual_ok(mu, Wt)
        opt = stationary & dual_ok & us_feas
        u[todo[opt]] = us[opt]
        done[todo[opt]] = True
        drop = stationary & ~opt & us_feas
        W[todo[drop], least[drop]] = False
        # a step: as far towards the working-set minimiser as feasibility allows
        move = fin & ~(stationary & us_feas)
        Ap = np.einsum("bgm,bm->bg", Gt, p)
        room = np.maximum(ht - np.einsum("bgm,bm->bg", Gt, ut), 0.0)
        block = (~Wt) & (Ap > 1e-14)
        ratio = np.where(block, room / np.where(block, Ap, 1.0), np.inf)
        k = np.argmin(ratio, axis=1)
        alpha = np.minimum(1.0, ratio[np.arange(todo.size), k])
        step = move[:, None] * alpha[:, None] * p
        u[todo] = ut + step
        add = move & (alpha < 1.0)
        W[todo[add], k[add]] = True
    return u, W, done


def solve_quadratic_batch(H: np.ndarray, c: np.ndarray, const: np.ndarray,
                          G: np.ndarray | None = None, h: np.ndarray | None = None, *,
                          guess: np.ndarray | None = None) -> QPSolution:
    """Exact minimisation of ``u' H u - 2 c' u + const`` on the simplex with ``G u <= h``.

    ``H`` symmetric positive semi-definite, shape (B, m, m); ``c`` (B, m); ``const`` (B,).
    The joint solver of :mod:`inversion.solver` uses it for its linearised steps, whose
    quadratic form is not built from a plain design matrix.

    ``guess`` (B, m + g) bool, an active set per row (for instance the one of the
    previous step), starts a few primal-dual active-set iterations; the rows they do not
    verify, and every row without a guess, go to the primal active-set method from a
    feasible vertex or the centre, and what that does not verify to enumeration (up to
    :data:`MAX_ENUMERATED_VARIABLES` variables; above, such rows are returned
    infeasible). See the module notes.
    """
    H = np.asarray(H, dtype=float)
    c = np.asarray(c, dtype=float)
    const = np.asarray(const, dtype=float)
    B, m, _ = H.shape
    if G is None:
        G = np.zeros((B, 0, m))
        h = np.zeros((B, 0))
    G = np.asarray(G, dtype=float)
    h = np.asarray(h, dtype=float)
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
    H_plain = H
    H = H + ridge[:, None, None] * np.eye(m)
    u = np.full((B, m), np.nan)
    active = np.zeros((B, n_ineq), dtype=bool)
    method = np.zeros(B, dtype=int)
    if guess is not None:
        uw, aw, ok = _active_set_iterations(H, c, Gall, hall, np.asarray(guess, bool),
                                            hscale)
        u[ok], active[ok], method[ok] = uw[ok], aw[ok], METHOD_WARM
    rest = np.flatnonzero(method == 0)
    if rest.size:
        u0, W0, has = _feasible_start(H[rest], c[rest], Gall[rest], hall[rest])
        sub = rest[has]
        if sub.size:
            up, Wp, ok = _primal_active_set(H[sub], c[sub], Gall[sub], hall[sub], u0[has],
                                            W0[has], hscale[sub], 4 * (m + n_ineq) + 10)
            u[sub[ok]], active[sub[ok]], method[sub[ok]] = up[ok], Wp[ok], METHOD_PRIMAL
    rest = np.flatnonzero(method == 0)
    if rest.size and m <= MAX_ENUMERATED_VARIABLES:
        ue, fe = _enumerate(H[rest], c[rest], const[rest], Gall[rest], hall[rest],
                            hscale[rest])
        u[rest[fe]], method[rest[fe]] = ue[fe], METHOD_ENUMERATION
        slack = np.einsum("bgm,bm->bg", Gall[rest], np.nan_to_num(ue)) - hall[rest]
        active[rest] = fe[:, None] & (np.abs(slack) < 1e-7)
    return _finish(u, method > 0, H_plain, c, const, active, method)


def _enumerate(H, c, const, Gall, hall, hscale):
    """The best feasible KKT solution over every admissible active set (global optimum
    of the convex problem). Returns u (B, m) and the feasible mask."""
    B, m, _ = H.shape
    n_ineq = Gall.shape[1]
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
    return best_u, np.isfinite(best_obj)


def _finish(u: np.ndarray, feasible: np.ndarray, H: np.ndarray, c: np.ndarray,
            const: np.ndarray, active: np.ndarray, method: np.ndarray) -> QPSolution:
    u = np.where(feasible[:, None], np.clip(u, 0.0, None), np.nan)
    u = u / np.where(feasible, u.sum(axis=1), 1.0)[:, None]
    uu = np.nan_to_num(u)
    obj = np.einsum("bi,bij,bj->b", uu, H, uu) - 2 * np.einsum("bi,bi->b", uu, c) + const
    obj = np.where(feasible, obj, np.inf)
    return QPSolution(u, obj, feasible, active, np.where(feasible, method, METHOD_NONE))


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
