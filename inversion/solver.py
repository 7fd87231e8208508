"""The joint solver of the convex inversion: every parameter at once, with its certificate.

The profile of :mod:`inversion.fit` holds the core-to-mantle mass ratio ``k`` and the
volatility parameters fixed while the exact QP chooses the weights; that finds good
starting points but not the optimum of the whole problem, because the weights move ``k``
(through the iron and siderophile budget) and the volatility parameters are only seen on
a grid. This module polishes a batch of starting points on the whole problem:

    minimise  chi2(u, theta) = sum_i ((log10 N_i(u, theta) - y_i) / sigma_i)**2
    over      u = (building-block weights, late weight) on the simplex,
              theta (volatility parameters) in their box,
    subject to the isotope windows (linear in u), the iron budget (core iron >= 0), the
              late-accretion bound and the optional core-mass-fraction range
              (nonlinear, through the core fixed point).

Notes
-----
Each iteration is a Levenberg-Marquardt step of the residuals linearised in all
parameters, with the Jacobian taken through the core fixed point (so the dependence of
``k`` on the weights and on theta is included) without solving it again per column: the
residual columns are analytic in the mantle ratios, whose change over each column's step
(the fd_step settings) comes from one core step and the implicit-function derivative at
the base state (:func:`_jacobian`); the late weight's column is the late component's
ratios; the constraint columns are differences of their values. The volatility step is
eliminated in closed form, which leaves a quadratic form in ``u`` alone:
with ``J_t`` the residual Jacobian of the free volatility parameters and
``P = I - J_t (J_t' J_t + lambda S_t)^-1 J_t'``, the step minimises
``(r0 + J_u du)' P (r0 + J_u du) + lambda s_u |du|^2`` on the simplex with the
linearised constraints, exactly, by the active-set enumeration of
:func:`inversion.qp.solve_quadratic_batch`; the volatility step follows as an affine
function of ``du``. Volatility parameters that would leave their box are held at the
bound and the step is solved again. A step is taken only if it lowers chi2 and keeps
every constraint; otherwise the damping ``lambda`` grows. chi2 therefore never
increases from a start, which is what guarantees that a mixture started from the
optimum of one of its subsets never fits worse than that subset.

The certificate of each answer (:func:`first_order_residual`) is the chi2 decrease that
one more undamped linearised step predicts: zero at a point that satisfies the
first-order (KKT) conditions of the linearised problem.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from . import kernel
from .model import Problem
from .qp import solve_quadratic_batch
from .volatility import get_form

__all__ = ["JointSettings", "evaluate", "forward_from", "polish", "first_order_residual",
           "curvature", "row_problem", "kink_boxes", "isotope_sigma", "gram"]

_LN10 = float(np.log(10.0))


@dataclass(frozen=True)
class JointSettings:
    """Settings of the joint polish (recorded in every result).

    ``max_iterations`` Levenberg-Marquardt iterations per start; a start stops when an
    accepted step lowers chi2 by less than ``tolerance`` (relative) or the damping
    exceeds ``max_damping``. ``constraint_tolerance`` is the slack allowed on the
    nonlinear constraints (relative to their scale).
    """

    max_iterations: int = 80
    tolerance: float = 1e-11
    max_damping: float = 1e8
    constraint_tolerance: float = 1e-9
    fd_step_weights: float = 1e-7
    fd_step_volatility: float = 1e-6


def row_problem(p: Problem, rows: np.ndarray) -> Problem:
    """``p`` with its per-row arrays (stacked hypotheses) taken at ``rows``.

    A problem with a single hypothesis (``Q`` of shape (K, n)) is returned as it is: its
    arrays broadcast over any batch.
    """
    from dataclasses import replace

    if p.Q.ndim == 2:
        return p
    from .model import ISOTOPE_BLOCK_KEYS

    iso = tuple({**d, **{k: np.asarray(d[k])[rows] for k in ISOTOPE_BLOCK_KEYS if k in d}}
                for d in p.isotopes)
    extra = {}
    q_sig = getattr(p, "Q_sigma_dex", None)
    if q_sig is not None and np.ndim(q_sig) == 3:
        extra["Q_sigma_dex"] = q_sig[rows]
    return replace(p, Q=p.Q[rows], c_comp_R=p.c_comp_R[rows], isotopes=iso, **extra)


def _v_max(p: Problem, M_s: np.ndarray) -> np.ndarray:
    lam_max = p.late_max_fraction
    c_R = 1.0 / M_s
    return lam_max * p.c_late_R / ((1.0 - lam_max) * c_R + lam_max * p.c_late_R)


def _model_sigma(p: Problem, U: np.ndarray, fi: np.ndarray) -> np.ndarray | None:
    """Model variance [dex^2] of the fitted elements from uncertain end-members, or None.

    With each block's ratio uncertain by ``Q_sigma_dex`` (log10, independent), the
    mixture's ratio ``sum_k u_k Q_ki`` has variance ``sum_k (u_k Q_ki ln10 s_ki)^2``; in
    dex that is divided by ``(ln10 * ratio_i)^2`` (effective variance, first order).
    """
    q_sig = getattr(p, "Q_sigma_dex", None)
    if q_sig is None:
        return None
    K = p.Q.shape[-2]
    # building blocks enter the final silicate through the volatility and core factors,
    # which scale each block's term alike; their relative sizes are those of u_k Q_ki
    Qf = p.Q[..., fi]
    QS2 = (Qf * np.asarray(q_sig)[..., fi]) ** 2  # (B, K, nf) or (K, nf), (ratio x dex)^2
    UK = U[:, :K]
    mix = np.einsum("bk,kn->bn" if Qf.ndim == 2 else "bk,bkn->bn", UK, Qf)
    var = np.einsum("bk,kn->bn" if QS2.ndim == 2 else "bk,bkn->bn", UK * UK, QS2)
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.sqrt(var) / mix
    return np.nan_to_num(rel) ** 2


def _forward_rows(p: Problem, U: np.ndarray, TH: np.ndarray,
                  s0: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """The forward quantities the misfit and the constraints read, for weights ``U``
    (B, m) as they are (off the simplex too: the bulk is linear in the weights and the
    core split homogeneous in the bulk, so the mantle scales with the blocks' sum)."""
    K = p.Q.shape[-2]
    c = kernel.static_of(p)
    with np.errstate(divide="ignore", invalid="ignore"):
        logr = kernel.relative_log_retained(np, c, TH)
        a = kernel.bulk(np, c, U[:, :K], logr)
        if s0 is not None:  # a warm start where it is a state at all
            s0 = np.asarray(s0, float)
            s0 = np.where(np.isfinite(s0).all(axis=1, keepdims=True), s0,
                          kernel.start_state(np, c, (a.shape[0],)))
        s, res = kernel.solve_core(np, c, a, p.D, s0)
    return _outputs(p, a, s, res)


def forward_from(p: Problem, w: np.ndarray, vol: np.ndarray,
                 s0: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """:func:`inversion.model.forward` (no late accretion) with the core fixed point
    started from ``s0`` (B, d), e.g. the ``state`` of a previous call at nearby
    parameters; rows of ``s0`` that are not finite start from the default."""
    c = kernel.static_of(p)
    if s0 is not None:
        s0 = np.asarray(s0, float)
        s0 = np.where(np.isfinite(s0).all(axis=1, keepdims=True), s0,
                      kernel.start_state(np, c, (w.shape[0],)))
    with np.errstate(divide="ignore"):
        return kernel.forward(np, c, w, vol, np.zeros(w.shape[0]), p.D, s0)


def _outputs(p: Problem, a: np.ndarray, s: np.ndarray, res: dict[str, np.ndarray]
             ) -> dict[str, np.ndarray]:
    fe = p.fe_index
    return {"mantle": res["mantle"][:, p.fit_index], "core_fe": res["core"][:, fe],
            "bulk_fe": a[:, fe], "M_s": res["M_s"][:, 0], "M_c": res["M_c"][:, 0],
            "state": s}


def evaluate(p: Problem, U: np.ndarray, TH: np.ndarray, *,
             cmf_range: tuple[float, float] | None = None,
             restore: bool = False, s0: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Residuals, chi2 and nonlinear constraint values for a batch of parameter sets.

    Parameters
    ----------
    p : Problem
        Single hypothesis, or stacked with one row per batch member.
    U : ndarray, shape (B, m)
        Weights of the building blocks and (last, when there is one) of the late
        component; rows on the simplex.
    TH : ndarray, shape (B, p)
        Volatility parameters.
    cmf_range : (low, high), optional
        Core-mass-fraction range imposed as a constraint.
    restore : bool
        Restoration mode: the residuals become the constraint violations (weighted
        1e3) with the misfit as a faint tie-breaker (1e-4), and no constraints; the
        polish then moves an infeasible start to the feasible set.
    s0 : ndarray, shape (B, d), optional
        Start of the core fixed point (e.g. the state of a nearby point).

    Returns
    -------
    dict
        ``r`` (B, n_fit) weighted residuals, ``chi2`` (B,), ``cons`` (B, c) constraint
        values that must be >= 0 (iron budget, late bound, CMF range; each scaled to be
        of order one), ``cmf``, ``M_s``, ``k`` (B,), and ``fw``, the forward quantities
        they were computed from (with the core state; :func:`_jacobian` linearises
        around them).
    """
    fw = _forward_rows(p, U, TH, s0)
    return _misfit(p, U, fw, cmf_range, restore)


def _misfit(p: Problem, U: np.ndarray, fw: dict[str, np.ndarray],
            cmf_range: tuple[float, float] | None, restore: bool) -> dict[str, np.ndarray]:
    """Residuals and constraint values of :func:`evaluate` from the forward quantities."""
    K = p.Q.shape[-2]
    fi = p.fit_index
    sK = U[:, :K].sum(axis=1)
    safe = np.where(sK > 0, sK, 1.0)
    ratio = _ratio(p, U, fw)
    with np.errstate(divide="ignore", invalid="ignore"):
        model = np.log10(ratio / p.q_ci[None, fi])
        var = _variance(p, U)
        r = (model - p.y[None, :]) / np.sqrt(var)
        M_s = fw["M_s"] / safe
        cmf = fw["M_c"] / (fw["M_s"] + fw["M_c"])
    chi2 = np.where(np.all(np.isfinite(r), axis=1), (r ** 2).sum(axis=1), np.inf)
    C = _constraints(p, U, fw, cmf_range, p.isotopes)
    if restore:
        r = np.concatenate([1e-4 * np.nan_to_num(r, nan=1e6, posinf=1e6, neginf=-1e6),
                            1e3 * np.minimum(C, 0.0)], axis=1)
        chi2 = (r ** 2).sum(axis=1)
        C = np.zeros((U.shape[0], 0))
    # the variance travels with the forward quantities (the Jacobian at this point
    # reads it)
    fw = {**fw, "var": np.broadcast_to(var, r.shape[:1] + var.shape[1:])}
    return {"r": r, "chi2": chi2, "cons": C, "cmf": cmf, "M_s": M_s,
            "k": fw["state"][:, 0], "fw": fw, "var": var, "ratio": ratio}


def _ratio(p: Problem, U: np.ndarray, fw: dict[str, np.ndarray]) -> np.ndarray:
    """Final silicate ratios to R of the fitted elements: mantle plus late component."""
    if p.late_name is None:
        return fw["mantle"]
    K = p.Q.shape[-2]
    return fw["mantle"] + U[:, K:K + 1] * p.q_late[None, p.fit_index]


def _variance(p: Problem, U: np.ndarray) -> np.ndarray:
    """Variance [dex^2] of each fitted element's residual: observation plus end-members."""
    var = np.broadcast_to(p.sigma[None, :] ** 2, (U.shape[0], p.fit_index.size))
    extra = _model_sigma(p, U, p.fit_index)
    return var if extra is None else var + extra


def _constraints(p: Problem, U: np.ndarray, fw: dict[str, np.ndarray],
                 cmf_range: tuple[float, float] | None,
                 isotopes: tuple[dict, ...]) -> np.ndarray:
    """Nonlinear constraint values (>= 0 when met) of :func:`evaluate`, shape (B, c);
    ``isotopes`` are the isotope systems with their per-block arrays for these rows."""
    K = p.Q.shape[-2]
    has_late = p.late_name is not None
    sK = U[:, :K].sum(axis=1)
    safe = np.where(sK > 0, sK, 1.0)
    cons = []
    with np.errstate(divide="ignore", invalid="ignore"):
        if p.mantle_Fe is not None:
            cons.append(fw["core_fe"] / np.maximum(fw["bulk_fe"], 1e-300))
        if has_late:
            # scaled by the bound, but not below 1e-3: a tiny bound must not turn
            # rounding in the weights into a violation
            cons.append((_v_max(p, fw["M_s"] / safe) - U[:, K])
                        / max(p.late_max_fraction, 1e-3))
        if cmf_range is not None:
            cmf = fw["M_c"] / (fw["M_s"] + fw["M_c"])
            cons.append(cmf - cmf_range[0])
            cons.append(cmf_range[1] - cmf)
    for iso in isotopes:
        # |eps_planet(u) - eps_obs| <= n sigma_eff(u): nonlinear through the widening of
        # the window by the end-members' uncertainties, so linearised with the rest
        eps_pl = isotope_prediction(p, iso, U)
        win = p.isotope_window_sigma * isotope_sigma(p, iso, U)
        cons.append((win - (eps_pl - iso["value"])) / iso["sigma"])
        cons.append((eps_pl - iso["value"] + win) / iso["sigma"])
    return np.stack(cons, axis=1) if cons else np.zeros((U.shape[0], 0))


def _variance_jacobian(p: Problem, U: np.ndarray) -> np.ndarray | None:
    """d(variance)/d(block weight) (B, n_fit, K) of :func:`_variance`, or None.

    The end-member term is ``E_i = num_i / mix_i**2`` with ``num_i = sum_k u_k**2 S_ki``
    (``S_ki = (Q_ki s_ki)**2``) and ``mix_i = sum_k u_k Q_ki``:
    ``dE_i/du_k = 2 u_k S_ki / mix_i**2 - 2 num_i Q_ki / mix_i**3``.
    """
    q_sig = getattr(p, "Q_sigma_dex", None)
    if q_sig is None:
        return None
    K = p.Q.shape[-2]
    fi = p.fit_index
    Qf = p.Q[..., fi]
    S = (Qf * np.asarray(q_sig)[..., fi]) ** 2
    UK = U[:, :K]
    if Qf.ndim == 2:
        Qf = np.broadcast_to(Qf, (U.shape[0],) + Qf.shape)
        S = np.broadcast_to(S, Qf.shape)
    mix = np.einsum("bk,bkn->bn", UK, Qf)
    num = np.einsum("bk,bkn->bn", UK * UK, S)
    with np.errstate(divide="ignore", invalid="ignore"):
        dE = (2.0 * UK[:, :, None] * S / mix[:, None, :] ** 2
              - 2.0 * (num / mix ** 3)[:, None, :] * Qf)
    dE = np.where(np.isfinite(dE) & (mix[:, None, :] != 0), dE, 0.0)
    return np.swapaxes(dE, 1, 2)


def isotope_sigma(p: Problem, iso: dict, U: np.ndarray) -> np.ndarray:
    """Isotope 1-sigma widened by the end-members' uncertainties at weights ``U`` (B, m).

    ``sigma_eff**2 = sigma_obs**2 + sum_k phi_k**2 (s_k**2 + r_k**2 (eps_k - eps_mix)**2)``
    with ``phi_k = u_k q_k / sum_j u_j q_j`` (the formula and a worked example are in
    :func:`inversion.isotopes.effective_sigma`; this is the same, batched).
    """
    K = p.Q.shape[-2]
    B = U.shape[0]
    if "eps_sigma" not in iso:
        return np.full(B, float(iso["sigma"]))
    eps, q, s = (np.broadcast_to(np.asarray(iso[k], float), (B, K))
                 for k in ("eps", "q_carrier", "eps_sigma"))
    r = np.broadcast_to(np.asarray(iso.get("q_carrier_rel_sigma", np.zeros(K)), float),
                        (B, K))
    if p.late_name is not None:
        eps = np.concatenate([eps, np.full((B, 1), iso["eps_late"])], axis=1)
        q = np.concatenate([q, np.full((B, 1), iso["q_late"])], axis=1)
        s = np.concatenate([s, np.full((B, 1), iso.get("eps_sigma_late", 0.0))], axis=1)
        r = np.concatenate([r, np.full((B, 1), iso.get("q_carrier_rel_sigma_late", 0.0))],
                           axis=1)
    uq = np.clip(U[:, :eps.shape[1]], 0.0, None) * q
    phi = uq / np.maximum(uq.sum(axis=1, keepdims=True), 1e-300)
    mix = (phi * eps).sum(axis=1, keepdims=True)
    var = iso["sigma"] ** 2 + (phi ** 2 * (s ** 2 + r ** 2 * (eps - mix) ** 2)).sum(axis=1)
    return np.sqrt(var)


def isotope_prediction(p: Problem, iso: dict, U: np.ndarray) -> np.ndarray:
    """Carrier-weighted isotope anomaly of the mixtures ``U`` (B, m):
    ``sum_k u_k q_k eps_k / sum_k u_k q_k`` over the blocks and the late component."""
    K = p.Q.shape[-2]
    B = U.shape[0]
    q = np.broadcast_to(np.asarray(iso["q_carrier"], float), (B, K))
    eps = np.broadcast_to(np.asarray(iso["eps"], float), (B, K))
    num = (U[:, :K] * q * eps).sum(axis=1)
    den = (U[:, :K] * q).sum(axis=1)
    if p.late_name is not None:
        num = num + U[:, K] * iso["q_late"] * iso["eps_late"]
        den = den + U[:, K] * iso["q_late"]
    return num / np.where(den > 0, den, 1e-300)


def _jacobian(p: Problem, U: np.ndarray, TH: np.ndarray, base: dict[str, np.ndarray],
              settings: JointSettings, cmf_range, upper: np.ndarray | None = None,
              restore: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Jacobians of residuals and constraints in (u, theta), by forward differences
    with the core fixed point linearised (no fixed-point solve per column).

    Each column perturbs one parameter by its step (the volatility steps go backwards
    where a forward step would pass ``upper``). The bulk of the perturbed point is
    exact (linear in the weights; the volatility factor recomputed); the core state
    follows from the implicit-function derivative at the base state ``s*``,
    ``ds = (I - dG/ds)^-1 (G(a + da, s*) - G(a, s*))``, and the reservoirs from one step
    of :func:`inversion.kernel.core_step` at ``(a + da, s*)`` plus ``d(res)/ds ds``:
    first-order in the step, as the difference quotient itself, at one core step per
    column instead of a solve (``dG/ds`` and ``d(res)/ds`` by a difference in ``s``,
    one more step per state variable). The late weight moves no bulk: its column only
    changes the mixing with the late component.
    """
    B, m = U.shape
    pp = TH.shape[1]
    K = p.Q.shape[-2]
    f = get_form(p.volatility_form)
    span = np.array(f.upper) - np.array(f.lower)
    steps = np.concatenate([np.full(m, settings.fd_step_weights),
                            settings.fd_step_volatility * span])
    n = m + pp
    # step away from the upper bound of the volatility parameters
    sign = np.ones((B, n))
    top = np.array(f.upper) if upper is None else upper
    sign[:, m:] = np.where(TH + steps[m:] > top, -1.0, 1.0)
    hstep = sign * steps  # (B, n)
    c = kernel.static_of(p)
    fw0 = base["fw"]
    s = fw0["state"]
    d = s.shape[1]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        logr0 = kernel.relative_log_retained(np, c, TH)
        a0 = kernel.bulk(np, c, U[:, :K], logr0)
        mix = kernel.bulk(np, c, U[:, :K], np.zeros_like(logr0))
        # bulk of the perturbed points that move it: blocks, then volatility parameters
        Q3 = p.Q if p.Q.ndim == 3 else p.Q[None]
        a_blocks = a0[:, None, :] + hstep[:, :K, None] * Q3 * (10.0 ** logr0)[:, None, :]
        THp = TH[:, None, :] + hstep[:, None, m:] * np.eye(pp)  # (B, pp, pp)
        logr_t = kernel.relative_log_retained(np, c, THp.reshape(B * pp, pp))
        a_vol = mix[:, None, :] * 10.0 ** logr_t.reshape(B, pp, -1)
        A = np.concatenate([a_blocks, a_vol], axis=1)  # (B, nc, nn)
        nc = A.shape[1]
        nn = A.shape[2]
        delta = 1e-7 * (1.0 + np.abs(s))  # (B, d)
        s_probe = s[:, None, :] + delta[:, None, :] * np.eye(d)  # (B, d, d)
        a_all = np.concatenate([a0[:, None, :], A, np.repeat(a0[:, None, :], d, axis=1)],
                               axis=1)  # (B, 1 + nc + d, nn)
        s_all = np.concatenate([s[:, None, :], np.repeat(s[:, None, :], nc, axis=1),
                                s_probe], axis=1)
        nq = 1 + nc + d
        D = p.D if np.ndim(p.D) == 1 else np.repeat(p.D, nq, axis=0)
        g, res = kernel.core_step(np, c, a_all.reshape(B * nq, nn), D,
                                  s_all.reshape(B * nq, d))
        g = g.reshape(B, nq, d)
        fe = p.fe_index
        fi = p.fit_index
        quant = {"mantle": res["mantle"][:, fi], "core_fe": res["core"][:, fe:fe + 1],
                 "M_s": res["M_s"], "M_c": res["M_c"]}
        quant = {k: v.reshape(B, nq, -1) for k, v in quant.items()}
        Js = np.swapaxes((g[:, 1 + nc:] - g[:, :1]) / delta[:, :, None], 1, 2)  # dG_i/ds_j
        ds = np.linalg.solve(np.eye(d) - Js, np.swapaxes(g[:, 1:1 + nc] - g[:, :1], 1, 2))
        ds = np.swapaxes(ds, 1, 2)  # (B, nc, d)
        # perturbed forward quantities: base + change at s* + d(res)/ds ds
        pert = {}
        for key, q in quant.items():
            dq_ds = (q[:, 1 + nc:] - q[:, :1]) / delta[:, :, None]  # (B, d, width)
            dq = q[:, 1:1 + nc] - q[:, :1] + np.einsum("bcd,bdw->bcw", ds, dq_ds)
            b0 = fw0[key] if fw0[key].ndim == 2 else fw0[key][:, None]
            pert[key] = b0[:, None, :] + dq  # (B, nc, width)
    # d(final ratio)/dz of every column: the mantle's change over the step (blocks and
    # volatility parameters), the late component's ratios for the late weight
    fi = p.fit_index
    cols = list(range(K)) + list(range(m, n))  # the columns that move the bulk
    dratio = np.zeros((B, n, fi.size))
    dratio[:, cols] = (pert["mantle"] - fw0["mantle"][:, None, :]) / hstep[:, cols, None]
    if m > K:
        dratio[:, K] = p.q_late[fi]
    ratio = _ratio(p, U, fw0)
    var = fw0["var"] if "var" in fw0 else _variance(p, U)
    with np.errstate(divide="ignore", invalid="ignore"):
        r_fit = (np.log10(ratio / p.q_ci[None, fi]) - p.y[None, :]) / np.sqrt(var)
        Jr = dratio / (_LN10 * ratio * np.sqrt(var))[:, None, :]
        dvar = _variance_jacobian(p, U)
        if dvar is not None:
            Jr[:, :K] -= np.swapaxes((r_fit / (2.0 * var))[:, :, None] * dvar, 1, 2)
    # constraints: by difference of their values at the perturbed points
    cons_fw = {key: None for key in ("core_fe", "bulk_fe", "M_s", "M_c")}
    for key in ("core_fe", "M_s", "M_c"):
        full = np.repeat(fw0[key][:, None], n, axis=1)
        full[:, cols] = pert[key][:, :, 0]
        cons_fw[key] = full.reshape(B * n)
    bulk_fe = np.repeat(a0[:, None, fe], n, axis=1)
    bulk_fe[:, cols] = A[:, :, fe]
    cons_fw["bulk_fe"] = bulk_fe.reshape(B * n)
    Zp = np.repeat(U[:, None, :], n, axis=1)
    idx = np.arange(m)
    Zp[:, idx, idx] += hstep[:, :m]
    rows = np.repeat(np.arange(B), n)
    iso = (row_problem(replace(p, Q=p.Q[..., :0], Q_sigma_dex=None), rows).isotopes
           if p.isotopes else ())
    cons = _constraints(p, Zp.reshape(B * n, m), cons_fw, cmf_range, iso)
    c_base = (_constraints(p, U, fw0, cmf_range, p.isotopes) if restore
              else base["cons"])
    Jc = (cons.reshape(B, n, -1) - c_base[:, None, :]) / hstep[:, :, None]
    if restore:
        ok = np.isfinite(r_fit)  # nan_to_num: no slope where not finite
        Jr = np.concatenate([1e-4 * np.where(ok[:, None, :], Jr, 0.0),
                             1e3 * (c_base < 0.0)[:, None, :] * Jc], axis=2)
        Jc = np.zeros((B, n, 0))
    return np.swapaxes(Jr, 1, 2), np.swapaxes(Jc, 1, 2)  # (B, nf, n), (B, c, n)


def gram(Jr: np.ndarray, r0: np.ndarray) -> np.ndarray:
    """Gram matrix ``[J r0]' [J r0]`` (B, n + 1, n + 1) of the residual Jacobian and the
    residuals: every quantity of a linearised step is a function of it (and of the
    constraint Jacobian), so a step costs O(n^3), not O(n_fit n^2)."""
    X = np.concatenate([Jr, r0[:, :, None]], axis=2)
    return np.matmul(np.swapaxes(X, 1, 2), X)


def _step(U, TH, Gm, c0, Jc, lam, free, fix, m, guess=None):
    """One damped linearised step for every row; returns (U_new, TH_new, predicted).

    ``Gm`` is :func:`gram` of the residual Jacobian (u columns first) and residuals.
    """
    pp = TH.shape[1]
    n = m + pp
    Guu = Gm[:, :m, :m]
    Gut = Gm[:, :m, m:n]
    Gtt = Gm[:, m:n, m:n]
    Gur = Gm[:, :m, n]
    Gtr = Gm[:, m:n, n]
    Grr = Gm[:, n, n]
    F = free.astype(float)
    # J_t = J_theta F (held parameters masked out); r0f = r0 + J_theta fix
    Gtt_fix = np.matmul(Gtt, fix[:, :, None])[:, :, 0]
    Jt_r0f = F * (Gtr + Gtt_fix)                       # J_t' r0f
    Ju_r0f = Gur + np.matmul(Gut, fix[:, :, None])[:, :, 0]  # J_u' r0f
    r0f_r0f = Grr + 2.0 * (fix * Gtr).sum(axis=1) + (fix * Gtt_fix).sum(axis=1)
    JtJt = F[:, :, None] * Gtt * F[:, None, :]
    st = np.diagonal(JtJt, axis1=1, axis2=2)
    st = np.where(st > 0, st, 1.0)
    Mt = JtJt + (lam[:, None] * st + (~free))[:, :, None] * np.eye(pp)
    Minv = np.linalg.inv(Mt)
    JtJu = F[:, :, None] * np.swapaxes(Gut, 1, 2)      # J_t' J_u
    a0 = -np.matmul(Minv, Jt_r0f[:, :, None])[:, :, 0]
    A1 = -np.matmul(Minv, JtJu)
    # objective (r0 + Ju du)' P (r0 + Ju du) = du' Ju'P Ju du + 2 du' Ju'P r0 + r0'P r0
    Hq = Guu + np.matmul(np.swapaxes(JtJu, 1, 2), A1)
    gq = Ju_r0f + np.matmul(np.swapaxes(JtJu, 1, 2), a0[:, :, None])[:, :, 0]
    rPr = r0f_r0f + (Jt_r0f * a0).sum(axis=1)
    su = np.trace(Hq, axis1=1, axis2=2) / m + 1e-300
    H = Hq + (lam * su)[:, None, None] * np.eye(m)
    # in u: du = u - u0  ->  u'Hu - 2 u'(H u0 - gq) + const
    HU = np.matmul(H, U[:, :, None])[:, :, 0]
    c = HU - gq
    const = (U * HU).sum(axis=1) - 2 * (U * gq).sum(axis=1)
    # nonlinear constraints linearised with the eliminated volatility step:
    # c0 + Jc_u du + Jc_t (a0 + A1 du + fix) >= 0
    Jct = Jc[:, :, m:] * free[:, None, :]
    Jcu = Jc[:, :, :m] + np.matmul(Jct, A1)
    c_off = c0 + np.matmul(Jc[:, :, m:], (a0 * free + fix)[:, :, None])[:, :, 0]
    G = -Jcu
    h = c_off - np.matmul(Jcu, U[:, :, None])[:, :, 0]
    if guess is None:
        guess = np.zeros((U.shape[0], m + G.shape[1]), dtype=bool)
    sol = solve_quadratic_batch(H, c, const, G, h, guess=guess)
    du = np.where(sol.feasible[:, None], sol.u - U, 0.0)
    dt = (a0 + np.matmul(A1, du[:, :, None])[:, :, 0]) * free + fix
    quad = ((du * np.matmul(Hq, du[:, :, None])[:, :, 0]).sum(axis=1)
            + 2 * (du * gq).sum(axis=1) + rPr)
    return U + du, TH + dt, quad, sol.feasible, sol.active


def _linearised_step(U, TH, Gm, c0, Jc, lam, bounds, m, guess=None):
    """A step with the volatility box handled by holding violators at their bound (the
    rows whose step leaves the box are solved again, the others keep theirs)."""
    lo, hi = bounds
    B, pp = TH.shape
    free = np.ones((B, pp), dtype=bool)
    fix = np.zeros((B, pp))
    Un, Tn, pred, ok, act = _step(U, TH, Gm, c0, Jc, lam, free, fix, m, guess)
    for _ in range(pp):
        out = free & ((Tn < lo) | (Tn > hi))
        rows = np.flatnonzero(out.any(axis=1))
        if rows.size == 0:
            break
        o = out[rows]
        free[rows] &= ~o
        target = np.where(Tn[rows] < lo[rows], lo[rows], hi[rows])
        fix[rows] = np.where(o, target - TH[rows], fix[rows])
        g = None if guess is None else guess[rows]
        res = _step(U[rows], TH[rows], Gm[rows], c0[rows], Jc[rows], lam[rows], free[rows],
                    fix[rows], m, g)
        Un[rows], Tn[rows], pred[rows], ok[rows], act[rows] = res
    Tn = np.clip(Tn, lo, hi)
    Un = np.clip(Un, 0.0, None)
    Un = Un / Un.sum(axis=1, keepdims=True)
    return Un, Tn, pred, ok, act


def _bounds(p: Problem, B: int, bounds: tuple[np.ndarray, np.ndarray] | None
            ) -> tuple[np.ndarray, np.ndarray]:
    f = get_form(p.volatility_form)
    if bounds is None:
        bounds = (np.array(f.lower, float), np.array(f.upper, float))
    pp = len(f.params)
    return (np.broadcast_to(bounds[0], (B, pp)).astype(float),
            np.broadcast_to(bounds[1], (B, pp)).astype(float))


def kink_boxes(p: Problem, th: np.ndarray, reach: int = 1
               ) -> list[tuple[np.ndarray, np.ndarray]]:
    """Boxes of the volatility parameters on which the misfit is smooth, around ``th``.

    The kinked forms bend at ``T0``: the misfit has a corner wherever ``T0`` equals the
    condensation temperature of a fitted element (or of the reference element), and is
    smooth between two such temperatures. A box per interval around ``th`` (``reach``
    intervals to each side, and both sides of a corner ``th`` sits on) lets the
    polish reach a corner optimum exactly, as a bound of a smooth problem, where the
    first-order conditions are well defined. Forms without a T0 return the form's box.
    """
    f = get_form(p.volatility_form)
    lo, hi = np.array(f.lower, float), np.array(f.upper, float)
    if "T0" not in f.params:
        return [(lo, hi)]
    j = f.params.index("T0")
    knots = np.unique(np.concatenate([p.tc[p.fit_index], [p.tc[p.ref_index]]]))
    knots = knots[(knots > lo[j]) & (knots < hi[j])]
    edges = np.concatenate([[lo[j]], knots, [hi[j]]])
    t = th[j]
    near = np.flatnonzero(np.abs(edges - t) <= 1e-6 * (hi[j] - lo[j]))
    pos = int(np.searchsorted(edges, t, side="right")) - 1
    centre = {min(max(pos, 0), len(edges) - 2)}
    for e in near:  # on a corner: the intervals on both sides
        centre |= {max(e - 1, 0), min(e, len(edges) - 2)}
    picks = set()
    for c in centre:
        picks |= set(range(max(c - reach, 0), min(c + reach, len(edges) - 2) + 1))
    out = []
    for i in sorted(picks):
        a, b = lo.copy(), hi.copy()
        a[j], b[j] = edges[i], edges[i + 1]
        out.append((a, b))
    return out


def polish(p: Problem, U0: np.ndarray, TH0: np.ndarray, *,
           settings: JointSettings | None = None,
           cmf_range: tuple[float, float] | None = None,
           bounds: tuple[np.ndarray, np.ndarray] | None = None,
           restore: bool = False) -> dict[str, np.ndarray]:
    """Levenberg-Marquardt on all parameters from a batch of starts.

    Parameters
    ----------
    p : Problem
        Single hypothesis, or stacked with one row per start.
    U0 : ndarray, shape (B, m)
        Starting weights (building blocks, then the late component).
    TH0 : ndarray, shape (B, p)
        Starting volatility parameters.
    settings : JointSettings, optional
    cmf_range : (low, high), optional
    bounds : (low, high) arrays of shape (B, p), optional
        Per-start box of the volatility parameters (default: the form's box).

    Returns
    -------
    dict
        ``U``, ``TH`` the answers, ``chi2`` (B,) (inf for a start that violates a
        constraint), ``iterations`` (B,), ``start_chi2`` (B,).
    """
    settings = settings or JointSettings()
    B, m = np.shape(U0)
    bounds = _bounds(p, B, bounds)
    U = np.array(U0, float)
    TH = np.clip(np.array(TH0, float), *bounds)
    tol_c = settings.constraint_tolerance
    base = evaluate(row_problem(p, np.arange(B)), U, TH, cmf_range=cmf_range,
                    restore=restore)
    bad = ~np.all(base["cons"] >= -tol_c, axis=1)
    if bad.any() and not restore:
        # restoration: move infeasible starts onto the feasible set first
        idx0 = np.flatnonzero(bad)
        rest = polish(row_problem(p, idx0), U[idx0], TH[idx0], settings=settings,
                      cmf_range=cmf_range, bounds=(bounds[0][idx0], bounds[1][idx0]),
                      restore=True)
        U[idx0], TH[idx0] = rest["U"], rest["TH"]
        base = evaluate(row_problem(p, np.arange(B)), U, TH, cmf_range=cmf_range)
    feasible = np.all(base["cons"] >= -tol_c, axis=1) & np.isfinite(base["chi2"])
    start_chi2 = np.where(feasible, base["chi2"], np.inf)
    chi2 = start_chi2.copy()
    lam = np.full(B, 1e-3)
    active = feasible.copy()
    iters = np.zeros(B, dtype=int)
    quiet = np.zeros(B, dtype=int)
    cons = base["cons"].copy()
    r = base["r"].copy()
    fw = {key: v.copy() for key, v in base["fw"].items()}
    act_sets = None
    stale = np.ones(B, dtype=bool)
    J_r = J_c = None
    for _ in range(settings.max_iterations):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        pr = row_problem(p, idx)
        bnd = (bounds[0][idx], bounds[1][idx])
        # a row whose last step was rejected is still at the same point: its Jacobian
        # is the one already computed (only the damping changes)
        need = idx[stale[idx]]
        if need.size:
            Jr_n, Jc_n = _jacobian(row_problem(p, need), U[need], TH[need],
                                   {"r": r[need], "cons": cons[need],
                                    "fw": {key: v[need] for key, v in fw.items()}},
                                   settings, cmf_range, bounds[1][need], restore)
            if J_r is None:
                J_r = np.zeros((B, Jr_n.shape[2] + 1, Jr_n.shape[2] + 1))
                J_c = np.zeros((B,) + Jc_n.shape[1:])
            J_r[need], J_c[need] = gram(Jr_n, r[need]), Jc_n
            stale[need] = False
        Jr, Jc = J_r[idx], J_c[idx]
        g_act = None if act_sets is None else act_sets[idx]
        Un, Tn, _pred, ok, act = _linearised_step(U[idx], TH[idx], Jr, cons[idx], Jc,
                                                  lam[idx], bnd, m, g_act)
        if act_sets is None:
            act_sets = np.zeros((B, act.shape[1]), dtype=bool)
        act_sets[idx] = act
        # the core fixed point starts from the state of the row's current point
        trial = evaluate(pr, Un, Tn, cmf_range=cmf_range, restore=restore,
                         s0=fw["state"][idx])
        good = (ok & np.isfinite(trial["chi2"]) & (trial["chi2"] <= chi2[idx])
                & np.all(trial["cons"] >= -tol_c, axis=1))
        gain = np.where(good, chi2[idx] - trial["chi2"], 0.0)
        acc = idx[good]
        stale[acc] = True
        U[acc], TH[acc] = Un[good], Tn[good]
        r[acc], cons[acc] = trial["r"][good], trial["cons"][good]
        for key, v in fw.items():
            v[acc] = trial["fw"][key][good]
        small = good & (gain <= settings.tolerance * (1.0 + chi2[idx]))
        chi2[acc] = trial["chi2"][good]
        lam[idx] = np.where(good, np.maximum(lam[idx] / 3.0, 1e-12), lam[idx] * 4.0)
        iters[idx] += 1
        quiet[idx] = np.where(small, quiet[idx] + 1, np.where(good, 0, quiet[idx]))
        done = (quiet[idx] >= 2) | (lam[idx] > settings.max_damping)
        active[idx[done]] = False
    return {"U": U, "TH": TH, "chi2": chi2, "iterations": iters, "start_chi2": start_chi2}


def first_order_residual(p: Problem, U: np.ndarray, TH: np.ndarray, *,
                         settings: JointSettings | None = None,
                         cmf_range: tuple[float, float] | None = None,
                         bounds: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """Predicted chi2 decrease of one undamped linearised step from each answer.

    Zero (to rounding) at a point that meets the first-order optimality (KKT)
    conditions of the linearised problem with its active constraints; the value is in
    chi2 units, so it compares directly with the chi2 tolerance of the answer.
    """
    settings = settings or JointSettings()
    B, m = U.shape
    bounds = _bounds(p, B, bounds)
    pr = row_problem(p, np.arange(B))
    base = evaluate(pr, U, TH, cmf_range=cmf_range)
    Jr, Jc = _jacobian(pr, U, TH, base, settings, cmf_range, bounds[1])
    _, _, pred, ok, _ = _linearised_step(U, TH, gram(Jr, base["r"]), base["cons"], Jc,
                                         np.full(B, 1e-12), bounds, m)
    return np.where(ok, np.maximum(base["chi2"] - pred, 0.0), np.nan)


def curvature(p: Problem, u: np.ndarray, th: np.ndarray, *,
              settings: JointSettings | None = None,
              cmf_range: tuple[float, float] | None = None,
              bounds: tuple[np.ndarray, np.ndarray] | None = None,
              active_tol: float = 1e-7
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """Gauss-Newton covariance of (u, theta) at one answer, on its active constraints.

    The free directions are those that keep the simplex sum, the weights at zero, the
    volatility parameters at their bounds and the active isotope and nonlinear
    constraints fixed; with ``N`` a basis of them and ``J`` the residual Jacobian,
    ``Cov = N (N' J'J N)^-1 N'`` (Laplace approximation of the likelihood
    ``exp(-chi2/2)`` at its maximum).

    Returns
    -------
    cov : ndarray (m + p, m + p)
    J : ndarray (n_fit, m + p)
        Residual Jacobian (for the delta method on derived quantities).
    N : ndarray
        The basis of free directions.
    active : list of str
        The active constraints (quantities they fix have zero width).
    """
    settings = settings or JointSettings()
    U = u[None].astype(float)
    TH = th[None].astype(float)
    pr = row_problem(p, np.arange(1))
    base = evaluate(pr, U, TH, cmf_range=cmf_range)
    Jr, Jc = _jacobian(pr, U, TH, base, settings, cmf_range)
    J = Jr[0]
    m = U.shape[1]
    n = J.shape[1]
    f = get_form(p.volatility_form)
    lo, hi = np.array(f.lower), np.array(f.upper)
    if bounds is not None:
        lo, hi = np.asarray(bounds[0], float), np.asarray(bounds[1], float)
    eq = [np.concatenate([np.ones(m), np.zeros(n - m)])]
    names: list[str] = []
    K = p.Q.shape[-2]
    labels = list(p.components)[:K] + (["late component"] if m > K else [])
    for k in range(m):
        if U[0, k] <= active_tol:
            e = np.zeros(n)
            e[k] = 1.0
            eq.append(e)
            names.append(f"weight of {labels[k]} at zero")
    span = hi - lo
    for j in range(n - m):
        if th[j] <= lo[j] + 1e-6 * span[j] or th[j] >= hi[j] - 1e-6 * span[j]:
            e = np.zeros(n)
            e[m + j] = 1.0
            eq.append(e)
            names.append(f"{f.params[j]} at {th[j]:.6g} (a bound or a kink of the form)")
    cons_names = (["iron budget"] if p.mantle_Fe is not None else []) + (
        ["late-accretion bound"] if p.late_name is not None else []) + (
        ["CMF range low", "CMF range high"] if cmf_range is not None else []) + [
        f"{iso['name']} window ({edge} edge)" for iso in p.isotopes
        for edge in ("upper", "lower")]
    for c, jc, nm in zip(base["cons"][0], Jc[0], cons_names, strict=True):
        if c <= 1e-6:
            eq.append(jc)
            names.append(nm)
    E = np.array(eq)
    # null space of the active constraints
    _, s, vt = np.linalg.svd(E)
    rank = int(np.sum(s > 1e-10 * s.max()))
    N = vt[rank:].T
    if N.shape[1] == 0:
        return np.zeros((n, n)), J, N, names
    F = N.T @ J.T @ J @ N
    cov = N @ np.linalg.pinv(F) @ N.T
    return cov, J, N, names
