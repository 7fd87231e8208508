"""The forward model, written once for any array namespace (docs/model.md sections 2-7).

Every physical step of the model lives here, as functions of an array namespace ``xp``:
``numpy`` for the batched evaluation of the convex fit, the screening and the star
catalogues (no compilation), ``jax.numpy`` for exact gradients and the log density the
NUTS sampler runs (:mod:`inversion.jaxmodel`). Arrays carry any leading batch shape and
the element axis last: ``(B, n)`` in the numpy paths, ``(n,)`` for one parameter set
under JAX.

The steps, in order:

1. mixture of the building blocks, ``a_i = (w @ Q)_i * r_i / r_R`` (:func:`bulk`);
2. volatility, ``log10 r_i`` of the declared form (:func:`inversion.volatility.log10_retained`);
3. core formation by mass balance, the fixed point of :func:`core_step` (solved by
   :func:`solve_core`);
4. late accretion of a mass fraction ``lam`` of the final mantle (:func:`assemble`);
5. the nucleosynthetic isotope balance of the carriers (:func:`isotope_balance`);
6. the end-member variance of the fitted elements (:func:`end_member_variance`).

Notes
-----
The fixed point ``s = G(s)`` of the core split (state ``s = [k]`` with the mantle FeO
fixed, ``[k, D_Fe]`` with the redox split) is solved by plain iteration from ``k = 0.5``
until k changes by less than ``CORE_RTOL * (1 + k)``. Under JAX the
iteration runs inside ``lax.while_loop`` and the gradient comes from one Newton step at
the solution with the solution and ``J = dG/ds`` held constant,
``s1 = s* + (I - J)^-1 (G(s*) - s*)``: its value is ``s*`` and its derivative is the
implicit-function derivative ``(I - J)^-1 dG/dtheta``, exact.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .volatility import log10_retained

__all__ = ["Static", "static_of", "bulk", "core_step", "solve_core", "assemble",
           "forward", "physical_state", "solve_feo_element_major", "isotope_balance",
           "isotope_variance", "end_member_variance", "CORE_ITERATIONS", "CORE_RTOL",
           "K_START"]

#: Maximum fixed-point iterations of the core split; chondritic bulks need about ten
#: with the mantle FeO fixed and about twenty-five with the redox split.
CORE_ITERATIONS = 200
#: Convergence of the fixed point: k changes by at most this fraction of (1 + k).
CORE_RTOL = 1e-12
#: Start of the core-to-mantle mass ratio (Earth-like planets have k ~ 0.5); the redox
#: split starts ``D_Fe`` at ``10**(-dIW/2) * 50/55`` (mean molar masses of silicate and
#: metal of about 50 and 55 g/mol).
K_START = 0.5


@dataclass(frozen=True)
class Static:
    """The constant arrays of a problem the forward model reads (numpy arrays)."""

    Q: np.ndarray             # (K, n) or stacked (B, K, n)
    tc: np.ndarray            # (n,)
    metal: np.ndarray | None  # (n,) bool, class mask of the split form
    ref_index: int
    fe_index: int
    oxide_factor: np.ndarray  # (n,)
    atomic_weight: np.ndarray  # (n,)
    cations: np.ndarray       # (n,)
    mantle_Fe: float | None
    dIW: Any                  # float, None (mantle FeO split) or (B,) per row (numpy)
    q_late: np.ndarray        # (n,)
    c_late_R: float
    q_ci: np.ndarray          # (n,)
    c_comp_R: np.ndarray      # (K,) or (B, K)
    form: str


def static_of(p: Any) -> Static:
    """The :class:`Static` arrays of a :class:`inversion.model.Problem`."""
    return Static(Q=np.asarray(p.Q, float), tc=np.asarray(p.tc, float),
                  metal=p.metal_class, ref_index=int(p.ref_index), fe_index=int(p.fe_index),
                  oxide_factor=np.asarray(p.oxide_factor, float),
                  atomic_weight=np.asarray(p.atomic_weight, float),
                  cations=np.asarray(p.cations, float),
                  mantle_Fe=None if p.mantle_Fe is None else float(p.mantle_Fe),
                  dIW=None if p.dIW is None else float(p.dIW),
                  q_late=np.asarray(p.q_late, float), c_late_R=float(p.c_late_R),
                  q_ci=np.asarray(p.q_ci, float), c_comp_R=np.asarray(p.c_comp_R, float),
                  form=p.volatility_form)


def _sum(xp: Any, x: Any) -> Any:
    return xp.sum(x, axis=-1, keepdims=True)


def relative_log_retained(xp: Any, c: Static, vol: Any) -> Any:
    """log10(r_i / r_R): the volatility factor relative to the reference element."""
    logr = log10_retained(c.form, vol, c.tc, metal=c.metal, xp=xp)
    return logr - logr[..., c.ref_index:c.ref_index + 1]


def bulk(xp: Any, c: Static, w: Any, logr: Any) -> Any:
    """Bulk element masses per unit mass of the reference element after volatile loss,
    ``a_i = (sum_k w_k Q_ki) 10**logr_i`` (R-basis weights ``w``, shape (..., K))."""
    if c.Q.ndim == 2:
        mix = w @ c.Q
    else:  # hypotheses stacked on the batch axis: Q is (B, K, n)
        mix = xp.einsum("bk,bkn->bn", w, c.Q)
    return mix * 10.0 ** logr


def start_state(xp: Any, c: Static, batch: tuple[int, ...]) -> Any:
    """Start of the fixed point, shape ``batch + (d,)`` (d = 1 or 2)."""
    if c.mantle_Fe is not None:
        return xp.full(batch + (1,), K_START)
    d_fe = _fe_ratio(c) * 50.0 / 55.0
    return xp.concatenate([xp.full(batch + (1,), K_START),
                           xp.broadcast_to(d_fe, batch + (1,))], axis=-1)


def _fe_ratio(c: Static) -> Any:
    """``10**(-dIW/2)``: a scalar (a number, or a traced JAX scalar when the sampler
    infers dIW), or (..., 1) for a per-row numpy dIW (batch shape)."""
    if isinstance(c.dIW, np.ndarray) and c.dIW.ndim > 0:
        return (10.0 ** (-c.dIW / 2.0))[..., None]
    return 10.0 ** (-c.dIW / 2.0)


def core_step(xp: Any, c: Static, a: Any, D: Any, s: Any) -> tuple[Any, dict[str, Any]]:
    """One step ``G(s)`` of the core mass balance, and the reservoirs computed from ``s``.

    ``a`` (..., n) bulk per unit R, ``D`` (n,) or (..., n) effective mass partition
    coefficients, ``s`` (..., d) the state ``[k]`` (mantle FeO fixed) or ``[k, D_Fe]``
    (redox split). Mantle-FeO split (mantle iron mass fraction ``F``)::

        m_i = a_i / (1 + D_i k)  (i != Fe),   M_s = sum_i m_i f_i / (1 - f_Fe F),
        m_Fe = F M_s,   M_c = sum_i (a_i - m_i),   G(k) = max(M_c, 0) / M_s

    Redox split: ``m_i = a_i / (1 + D_i k)`` with ``D_Fe`` from the state,
    ``M_s = sum_i m_i f_i``, and the next ``D_Fe = 10**(-dIW/2) Mbar_sil / Mbar_met``
    (ideal mixing of oxide formula units and of metal atoms).
    """
    fe = c.fe_index
    f = c.oxide_factor
    is_fe = np.zeros(c.tc.size)
    is_fe[fe] = 1.0
    k = s[..., 0:1]
    if c.mantle_Fe is not None:
        m = a / (1.0 + D * k) * (1.0 - is_fe)
        M_s = _sum(xp, m * f) / (1.0 - f[fe] * c.mantle_Fe)
        m = m + is_fe * c.mantle_Fe * M_s
        core = a - m
        M_c = _sum(xp, core)
        nxt = xp.maximum(M_c, 0.0) / M_s
        return nxt, {"mantle": m, "core": core, "M_s": M_s, "M_c": M_c,
                     "D_Fe": xp.full_like(M_s, np.nan)}
    aw = c.atomic_weight
    d_fe = s[..., 1:2]
    Dk = D * (1.0 - is_fe) + is_fe * d_fe
    m = a / (1.0 + Dk * k)
    M_s = _sum(xp, m * f)
    core = a - m
    M_c = _sum(xp, core)
    mol_sil = _sum(xp, m / (aw * c.cations))
    mol_met = _sum(xp, xp.maximum(core, 0.0) / aw)
    mbar_met = xp.where(mol_met > 0, M_c / xp.maximum(mol_met, 1e-300), aw[fe])
    nxt_d = _fe_ratio(c) * (M_s / mol_sil) / mbar_met
    nxt = xp.concatenate([xp.maximum(M_c, 0.0) / M_s, nxt_d], axis=-1)
    return nxt, {"mantle": m, "core": core, "M_s": M_s, "M_c": M_c, "D_Fe": nxt_d}


def _converged(xp: Any, s: Any, s_prev: Any) -> Any:
    # on k alone: where the core vanishes (k -> 0) D_Fe is undetermined and need not settle
    k, k_prev = s[..., 0], s_prev[..., 0]
    return xp.all(xp.abs(k - k_prev) <= CORE_RTOL * (1.0 + xp.abs(k)))


def solve_core(xp: Any, c: Static, a: Any, D: Any, s0: Any | None = None
               ) -> tuple[Any, dict[str, Any]]:
    """The fixed point of :func:`core_step` and the reservoirs at it.

    numpy: plain iteration over the whole batch until every row has converged (at most
    :data:`CORE_ITERATIONS`). JAX: the same iteration in ``lax.while_loop``, then the
    implicit-function Newton step of the module notes (exact gradient).
    """
    if xp is np and c.mantle_Fe is not None:
        return _solve_feo_numpy(c, a, D, None if s0 is None else s0[..., 0])
    s = start_state(xp, c, tuple(a.shape[:-1])) if s0 is None else s0
    if xp is np:
        return _plain_iteration(c, a, D, s)
    return _solve_core_jax(c, a, D, s)


def _plain_iteration(c: Static, a: np.ndarray, D: np.ndarray, s: np.ndarray
                     ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """``s <- G(s)`` on numpy over the whole batch until every row has converged."""
    res: dict[str, Any] = {}
    for _ in range(CORE_ITERATIONS):
        nxt, res = core_step(np, c, a, D, s)
        done = _converged(np, nxt, s)
        s = nxt
        if done:
            break
    return s, res


def _solve_feo_numpy(c: Static, a: np.ndarray, D: np.ndarray, k0: np.ndarray | None
                     ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """The mantle-FeO fixed point on numpy, by Newton's method on k (batch shape of ``a``
    (..., n); ``D`` (n,) or with the same batch shape; ``k0`` warm start)."""
    n = a.shape[-1]
    batch = a.shape[:-1]
    at = np.ascontiguousarray(a.reshape(-1, n).T)
    Dt = (np.asarray(D, float)[:, None] if np.ndim(D) == 1
          else np.ascontiguousarray(np.broadcast_to(D, a.shape).reshape(-1, n).T))
    k = None if k0 is None else np.asarray(k0, float).reshape(-1)
    k, mt, core, M_s = solve_feo_element_major(c, at, Dt, k)
    out = {"mantle": mt.T.reshape(a.shape), "core": core.T.reshape(a.shape),
           "M_s": M_s.reshape(batch + (1,)), "M_c": core.sum(axis=0).reshape(batch + (1,)),
           "D_Fe": np.full(batch + (1,), np.nan)}
    return k.reshape(batch + (1,)), out


def solve_feo_element_major(c: Static, at: np.ndarray, Dt: np.ndarray,
                            k0: np.ndarray | None = None
                            ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The fixed point of :func:`core_step` with the mantle FeO fixed, by Newton's method.

    The same mass balance as :func:`core_step`: ``m_i = a_i / (1 + D_i k)`` (i != Fe),
    ``M_s = sum_i f_i m_i / (1 - f_Fe F)``, ``m_Fe = F M_s``, ``M_c = sum(a - m)``; the
    fixed point ``k = max(M_c, 0) / M_s`` is the root (clamped at 0) of
    ``h(k) = M_c(k) - k M_s(k)``, found by Newton's method over the elements with D > 0
    (the others enter through one sum). Each column stops at its own convergence
    (``|dk| <= CORE_RTOL (1 + k)``), so a result never depends on the rest of the batch.
    A root where the fixed point repels (G' >= 1: Newton can land there, the plain
    iteration cannot), or a column Newton did not settle, takes the plain iteration's
    point. Element-major layout:
    long inner loops at catalogue scale.

    Parameters
    ----------
    c : Static
        With ``mantle_Fe`` set.
    at : ndarray, shape (n, B)
        Bulk per unit R, element-major.
    Dt : ndarray, shape (n, 1) or (n, B)
        Effective mass partition coefficients.
    k0 : ndarray, shape (B,), optional
        Start (default :data:`K_START`).

    Returns
    -------
    k (B,), mantle (n, B), core (n, B), M_s (B,)
    """
    fe = c.fe_index
    f = c.oxide_factor
    F = float(c.mantle_Fe)
    n, B = at.shape
    others = np.arange(n) != fe
    sid = np.flatnonzero(others & (Dt > 0).any(axis=1))
    lith = np.flatnonzero(others & ~(Dt > 0).any(axis=1))
    scale = 1.0 / (1.0 - f[fe] * F)
    Lf = f[lith] @ at[lith]
    a_s = at[sid]
    D_s = Dt[sid]
    f_s = f[sid]
    a_fixed = at[fe] + a_s.sum(axis=0)
    k = np.full(B, K_START) if k0 is None else np.array(k0, float)
    frozen = np.zeros(B, dtype=bool)
    give = np.zeros(B, dtype=bool)  # columns handed to the plain iteration early
    for it in range(CORE_ITERATIONS):
        den = 1.0 + D_s * k
        m_s = a_s / den
        dm = m_s * D_s / den  # minus dm_s/dk
        M_s = (Lf + f_s @ m_s) * scale
        dM_s = -(f_s @ dm) * scale
        M_c = a_fixed - m_s.sum(axis=0) - F * M_s
        h = M_c - k * M_s
        dh = dm.sum(axis=0) - F * dM_s - M_s - k * dM_s
        with np.errstate(divide="ignore", invalid="ignore"):
            k_new = np.maximum(k - h / dh, 0.0)
        k_new = np.where(np.isfinite(k_new), k_new, 0.0)
        done = np.abs(k_new - k) <= CORE_RTOL * (1.0 + k)
        k = np.where(frozen, k, k_new)
        frozen |= done
        # no core (M_c <= 0) after a few steps: Newton wanders on h < 0; the plain
        # iteration settles such a column (at k = 0) in two steps
        give |= ~frozen & (M_c <= 0) & (it > 3)
        frozen |= give
        if frozen.all():
            break
    # a root with dh/dk >= 0 is a repelling fixed point of k = G(k) (G' >= 1 there): the
    # plain iteration leaves it (to k = 0 or another root), so those columns, and any
    # Newton did not settle (cycling between k = 0 and a step off it where M_c < 0), take
    # the plain iteration from K_START, the attracting point the iteration reaches
    den = 1.0 + D_s * k
    m_s = a_s / den
    dm = m_s * D_s / den
    M_s = (Lf + f_s @ m_s) * scale
    dM_s = -(f_s @ dm) * scale
    repel = ((k > 0) & (dm.sum(axis=0) - F * dM_s - M_s - k * dM_s >= 0)) | ~frozen | give
    if repel.any():
        sub = np.flatnonzero(repel)
        a_sub = np.ascontiguousarray(at[:, sub].T)
        D_sub = Dt[:, 0] if Dt.shape[1] == 1 else np.ascontiguousarray(Dt[:, sub].T)
        sk, _ = _plain_iteration(c, a_sub, D_sub, np.full((sub.size, 1), K_START))
        k = k.copy()
        k[sub] = sk[:, 0]
    mt = at / (1.0 + Dt * k)
    mt[fe] = 0.0
    M_s = (f @ mt) * scale
    mt[fe] = F * M_s
    return k, mt, at - mt, M_s


def _inv_i_minus(xp: Any, J: Any) -> Any:
    """``(I - J)^-1`` of a 1 x 1 or 2 x 2 Jacobian, in closed form."""
    if J.shape[-1] == 1:
        return 1.0 / (1.0 - J)
    a11, a12 = 1.0 - J[..., 0, 0], -J[..., 0, 1]
    a21, a22 = -J[..., 1, 0], 1.0 - J[..., 1, 1]
    det = a11 * a22 - a12 * a21
    return xp.stack([xp.stack([a22, -a12], axis=-1), xp.stack([-a21, a11], axis=-1)],
                    axis=-2) / det[..., None, None]


def _solve_core_jax(c: Static, a: Any, D: Any, s0: Any) -> tuple[Any, dict[str, Any]]:
    """Newton's method on ``s - G(s) = 0`` (a plain step where a Newton step leaves the
    physical range), then the implicit-function step of the module notes."""
    import jax
    import jax.numpy as jnp

    a0 = jax.lax.stop_gradient(a)
    D0 = jax.lax.stop_gradient(D)

    def step(s: Any) -> Any:
        return core_step(jnp, c, a0, D0, s)[0]

    def newton(s: Any) -> Any:
        g, J = jax.jvp(step, (s,), (jnp.ones_like(s),)) if s.shape[-1] == 1 else (
            step(s), jax.jacfwd(step)(s))
        if s.shape[-1] == 1:
            J = J[..., None]
        nxt = s + _inv_i_minus(jnp, J) @ (g - s)
        ok = jnp.all(jnp.isfinite(nxt)) & (nxt[0] >= 0.0) & jnp.all(nxt[1:] > 0.0)
        return jnp.where(ok, nxt, g)

    def cond(carry: Any) -> Any:
        i, s, s_prev = carry
        return (i < CORE_ITERATIONS) & ~_converged(jnp, s, s_prev)

    def body(carry: Any) -> Any:
        i, s, _ = carry
        return i + 1, newton(s), s

    _, s_star, _ = jax.lax.while_loop(cond, body, (0, newton(s0), s0))
    s_star = jax.lax.stop_gradient(s_star)
    # implicit-function step: J = dG/ds at the solution, held constant
    J = jax.lax.stop_gradient(jax.jacfwd(step)(s_star))
    g, _ = core_step(jnp, c, a, D, s_star)
    s1 = s_star + _inv_i_minus(jnp, J) @ (g - s_star)
    _, res = core_step(jnp, c, a, D, s1)
    return s1, res


def assemble(xp: Any, c: Static, split: dict[str, Any], lam: Any) -> dict[str, Any]:
    """Late accretion and the planet: ``lam`` (...,) is the late component's mass
    fraction of the final mantle; returns the final ratios to R, ``log10N``
    (normalised to ``q_ci`` and R), the R-basis late weight ``v``, ``cmf``."""
    M_s = split["M_s"][..., 0]
    M_c = split["M_c"][..., 0]
    c_R = 1.0 / M_s
    v = lam * c.c_late_R / ((1.0 - lam) * c_R + lam * c.c_late_R)
    ratio = (1.0 - v)[..., None] * split["mantle"] + v[..., None] * c.q_late
    return {"ratio": ratio, "log10N": xp.log10(ratio / c.q_ci), "v": v,
            "M_s": M_s, "M_c": M_c, "cmf": M_c / (M_s + M_c)}


def forward(xp: Any, c: Static, w: Any, vol: Any, lam: Any, D: Any,
            s0: Any | None = None) -> dict[str, Any]:
    """The whole forward model for weights ``w`` (..., K), volatility parameters
    ``vol`` (..., p), late fraction ``lam`` (...,) and partition coefficients ``D``.

    Returns ``log10N``, ``ratio``, ``bulk``, ``mantle``, ``core`` (..., n); ``M_s``,
    ``M_c``, ``k``, ``cmf``, ``v``, ``D_Fe`` (...,); ``x`` (..., K) bulk mass fractions
    of the blocks; ``logr`` (..., n); ``state`` (..., d) the core fixed point.
    """
    logr = relative_log_retained(xp, c, vol)
    a = bulk(xp, c, w, logr)
    s, split = solve_core(xp, c, a, D, s0)
    out = assemble(xp, c, split, lam)
    x = w / c.c_comp_R
    x = x / _sum(xp, x)
    out.update({"bulk": a, "mantle": split["mantle"], "core": split["core"],
                "k": s[..., 0], "D_Fe": split["D_Fe"][..., 0], "x": x, "logr": logr,
                "lam": lam, "state": s})
    out.update(physical_state(xp, c, a, split["core"]))
    return out


def physical_state(xp: Any, c: Static, a: Any, core: Any) -> dict[str, Any]:
    """Whether the reservoirs of a core split are physical.

    With the mantle FeO fixed, the mantle's iron is set by the target, so a bulk that
    holds less iron than that mantle needs (strong loss of Fe at a high onset, a high
    mantle FeO) leaves a *negative* core iron mass, and possibly a negative core. Such a
    state is not a planet: the solvers treat it as infeasible (the iron budget), the
    sampler's density is zero there, and any table built from it says so.

    Returns
    -------
    dict
        ``core_iron_margin`` (...,) core iron over bulk iron (1 - the mantle's share;
        negative where the mantle needs more iron than the bulk holds); ``physical``
        (...,) bool: every core mass >= 0 (to 1e-9 of the element's bulk mass) and the
        core mass >= 0.
    """
    fe = c.fe_index
    margin = core[..., fe] / xp.where(a[..., fe] > 0, a[..., fe], 1.0)
    ok = xp.all(core >= -1e-9 * xp.abs(a), axis=-1) & (_sum(xp, core)[..., 0] >= 0.0)
    return {"core_iron_margin": margin, "physical": ok}


def isotope_balance(xp: Any, iso: dict[str, Any], w: Any, v: Any) -> tuple[Any, Any, Any]:
    """Carrier-weighted anomaly of the planet and the carrier shares.

    ``eps = [(1 - v) sum_k w_k q_k eps_k + v q_L eps_L] / den`` with
    ``den = (1 - v) sum_k w_k q_k + v q_L``; returns ``(eps, phi, phi_late)``, the shares
    ``phi_k = (1 - v) w_k q_k / den`` and ``phi_late = v q_L / den``.
    """
    q = iso["q_carrier"]
    num = (1.0 - v) * xp.sum(w * q * iso["eps"], axis=-1) + v * iso["q_late"] * iso[
        "eps_late"]
    den = (1.0 - v) * xp.sum(w * q, axis=-1) + v * iso["q_late"]
    phi = ((1.0 - v) / den)[..., None] * w * q
    return num / den, phi, v * iso["q_late"] / den


def isotope_variance(xp: Any, iso: dict[str, Any], w: Any, v: Any) -> tuple[Any, Any]:
    """The planet's anomaly and its variance widened by the end-members' errors,
    ``sigma_obs**2 + sum_k phi_k**2 (s_k**2 + r_k**2 (eps_k - eps)**2)`` over the blocks
    and the late component (:func:`inversion.isotopes.effective_sigma`)."""
    eps, phi, phi_late = isotope_balance(xp, iso, w, v)
    K = np.size(iso["eps"])
    s_k = np.asarray(iso.get("eps_sigma", np.zeros(K)), float)
    r_k = np.asarray(iso.get("q_carrier_rel_sigma", np.zeros(K)), float)
    var = iso["sigma"] ** 2 + xp.sum(phi ** 2 * (s_k ** 2 + r_k ** 2 * (
        iso["eps"] - eps[..., None]) ** 2), axis=-1) + phi_late ** 2 * (
        iso.get("eps_sigma_late", 0.0) ** 2
        + iso.get("q_carrier_rel_sigma_late", 0.0) ** 2 * (iso["eps_late"] - eps) ** 2)
    return eps, var


def end_member_variance(xp: Any, Q: Any, S: Any, w: Any) -> Any:
    """Model variance [dex^2] of elements from uncertain end-members.

    The bulk ratio ``B_i = sum_k w_k Q_ki``; each ``Q_ki`` uncertain by ``s_ki`` dex,
    independent between blocks (``dQ_ki = ln10 Q_ki s_ki``), gives
    ``var(log10 B_i) = sum_k (w_k Q_ki s_ki)**2 / B_i**2``. Volatility and core factors
    multiply ``B_i`` and leave the relative spread unchanged; the late component's share
    is neglected (conservative for the highly siderophile elements). ``Q``, ``S`` are
    (K, m) or stacked (B, K, m); ``w`` (..., K).
    """
    wq = w[..., :, None] * Q
    return xp.sum((wq * S) ** 2, axis=-2) / xp.sum(wq, axis=-2) ** 2
