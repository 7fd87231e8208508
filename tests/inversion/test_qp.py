"""The simplex QP of inversion.qp against two independent solvers written here.

Problems: minimise ||A u - b||^2 on the simplex (sum u = 1, u >= 0) with G u <= h, 240
random problems, a third of them degenerate (duplicate columns, rank-deficient A,
repeated or redundant inequality rows). References:

* brute force: every admissible active set, its equality-constrained least-squares
  problem solved with a pseudo-inverse (no regularisation), the best feasible solution
  kept; this is the exact optimum (the optimum of a convex QP solves the problem on its
  own active set);
* scipy's SLSQP from the vertices and the centre (a one-sided check: ours never worse).

Tolerance: objective gap <= 1e-9 relative (to max(1, |objective|)).
"""

from __future__ import annotations

from itertools import combinations

import numpy as np
import pytest
from scipy.optimize import minimize

from inversion.qp import (
    METHOD_ENUMERATION,
    METHOD_PRIMAL,
    METHOD_WARM,
    solve_batch,
    solve_quadratic_batch,
)

REL = 1e-9


def _problem(rng: np.random.Generator, kind: str):
    m = int(rng.integers(2, 7))
    g = int(rng.integers(0, 4))
    n = int(rng.integers(m, 14))
    A = rng.normal(size=(n, m))
    b = rng.normal(size=n) * 2.0
    G = rng.normal(size=(g, m))
    h = rng.uniform(-0.1, 0.4, size=g)
    if kind == "duplicate" and m >= 2:
        A[:, -1] = A[:, 0]  # two identical building blocks
    elif kind == "rank":
        r = max(1, m - 2)
        A = rng.normal(size=(n, r)) @ rng.normal(size=(r, m))  # rank r < m
    elif kind == "rows":
        extra = [np.ones((1, m))]  # sum(u) <= 1: redundant with the simplex
        if g:
            extra.append(G[:1])  # a repeated inequality
        G = np.concatenate([G] + extra)
        h = np.concatenate([h, [1.0], h[:1]] if g else [h, [1.0]])
    return A, b, G, h


def _brute_force(A, b, G, h) -> float:
    """Exact optimum by every admissible active set (pinv), inf when infeasible."""
    n, m = A.shape
    C_all = np.concatenate([-np.eye(m), G])
    d_all = np.concatenate([np.zeros(m), h])
    H = 2.0 * A.T @ A
    q = 2.0 * A.T @ b
    best = np.inf
    for size in range(0, m):
        sets = np.array(list(combinations(range(C_all.shape[0]), size)), dtype=int)
        sets = sets.reshape(len(sets), size)
        C = np.concatenate([np.ones((len(sets), 1, m)), C_all[sets]], axis=1)
        d = np.concatenate([np.ones((len(sets), 1)), d_all[sets]], axis=1)
        k = size + 1
        K = np.zeros((len(sets), m + k, m + k))
        K[:, :m, :m] = H
        K[:, :m, m:] = np.swapaxes(C, 1, 2)
        K[:, m:, :m] = C
        rhs = np.concatenate([np.broadcast_to(q, (len(sets), m)), d], axis=1)
        u = np.einsum("sij,sj->si", np.linalg.pinv(K), rhs)[:, :m]
        consistent = np.all(np.abs(np.einsum("skm,sm->sk", C, u) - d) <= 1e-9, axis=1)
        feasible = np.all(u @ C_all.T <= d_all + 1e-9, axis=1)
        ok = consistent & feasible  # contradictory sets fail the first test
        if ok.any():
            r = u[ok] @ A.T - b
            best = min(best, float((r ** 2).sum(axis=1).min()))
    return best


def _slsqp(A, b, G, h) -> float:
    m = A.shape[1]
    cons = [{"type": "eq", "fun": lambda u: u.sum() - 1.0, "jac": lambda u: np.ones(m)}]
    if G.shape[0]:
        cons.append({"type": "ineq", "fun": lambda u: h - G @ u, "jac": lambda u: -G})
    best = np.inf
    for x0 in list(np.eye(m)) + [np.full(m, 1.0 / m)]:
        res = minimize(lambda u: float(((A @ u - b) ** 2).sum()), x0,
                       jac=lambda u: 2.0 * A.T @ (A @ u - b), method="SLSQP",
                       bounds=[(0.0, 1.0)] * m, constraints=cons,
                       options={"ftol": 1e-14, "maxiter": 500})
        u = res.x
        if (abs(u.sum() - 1.0) < 1e-8 and u.min() >= -1e-8
                and (G.shape[0] == 0 or np.all(G @ u <= h + 1e-8))):
            best = min(best, float(((A @ u - b) ** 2).sum()))
    return best


@pytest.fixture(scope="module")
def problems():
    rng = np.random.default_rng(20261202)
    kinds = ["plain", "duplicate", "rank", "rows"]
    return [(kinds[i % 4],) + _problem(rng, kinds[i % 4]) for i in range(240)]


def test_qp_matches_brute_force_and_slsqp(problems) -> None:
    methods = []
    n_feasible = 0
    for kind, A, b, G, h in problems:
        g = G.shape[0]
        sol = solve_batch(A[None], b[None], G[None] if g else None, h[None] if g else None)
        exact = _brute_force(A, b, G, h)
        assert bool(sol.feasible[0]) == np.isfinite(exact), kind
        if not np.isfinite(exact):
            continue
        n_feasible += 1
        ours = float(sol.objective[0])
        scale = max(1.0, abs(exact))
        assert abs(ours - exact) <= REL * scale, (kind, ours, exact)
        u = sol.u[0]
        assert abs(u.sum() - 1.0) < 1e-12 and u.min() >= 0.0
        if g:
            assert np.all(G @ u <= h + 1e-8)
        ref = _slsqp(A, b, G, h)
        if np.isfinite(ref):
            assert ours <= ref + REL * max(1.0, abs(ref)), (kind, ours, ref)
        methods.append(int(sol.method[0]))
    assert n_feasible >= 200
    # the primal active-set method answers most rows; enumeration is the fallback only
    methods = np.array(methods)
    assert np.mean(methods == METHOD_PRIMAL) >= 0.8
    assert set(methods) <= {METHOD_PRIMAL, METHOD_ENUMERATION}


def test_primal_answers_carry_a_kkt_certificate(problems) -> None:
    # at every answer of the primal method: the multipliers of the active inequalities
    # (solved here from the stationarity conditions) are >= 0 and the residual vanishes
    for kind, A, b, G, h in problems[:120]:
        g = G.shape[0]
        sol = solve_batch(A[None], b[None], G[None] if g else None, h[None] if g else None)
        if sol.method[0] != METHOD_PRIMAL:
            continue
        u = sol.u[0]
        m = u.size
        C_all = np.concatenate([-np.eye(m), G])
        d_all = np.concatenate([np.zeros(m), h])
        act = np.abs(C_all @ u - d_all) <= 1e-9 * (1.0 + np.abs(d_all))
        grad = 2.0 * A.T @ (A @ u - b)
        M = np.concatenate([np.ones((m, 1)), C_all[act].T], axis=1)
        lam, *_ = np.linalg.lstsq(M, -grad, rcond=None)
        resid = np.linalg.norm(M @ lam + grad)
        assert resid <= 1e-6 * (1.0 + np.linalg.norm(grad)), kind
        if act.any():
            # multipliers of a degenerate active set are not unique; the minimum-norm
            # ones need not be >= 0 there, so the check is on the objective instead
            if np.linalg.matrix_rank(M) == M.shape[1]:
                assert lam[1:].min() >= -1e-6 * (1.0 + np.abs(lam).max()), kind


def test_warm_guess_verifies_at_once() -> None:
    rng = np.random.default_rng(5)
    A = rng.normal(size=(40, 10, 4))
    b = rng.normal(size=(40, 10))
    G = rng.normal(size=(40, 2, 4))
    h = rng.uniform(0.0, 0.3, size=(40, 2))
    H = np.einsum("bni,bnj->bij", A, A)
    c = np.einsum("bni,bn->bi", A, b)
    const = (b * b).sum(axis=1)
    cold = solve_quadratic_batch(H, c, const, G, h)
    warm = solve_quadratic_batch(H, c, const, G, h, guess=cold.active)
    ok = cold.feasible
    assert ok.sum() >= 20
    np.testing.assert_allclose(warm.objective[ok], cold.objective[ok], rtol=1e-10)
    assert np.all(warm.method[ok] == METHOD_WARM)
