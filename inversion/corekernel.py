"""Compiled kernels of the core fixed point (docs/model.md section 4), for the samplers.

The core split of :func:`inversion.model._core_split` solves ``s = G(s)`` for the state
``s`` of the core mass balance: ``[k]`` with ``k = M_c / M_s`` when the mantle FeO is
fixed, ``[k, D_Fe]`` when the iron split follows the redox state dIW. The Bayesian model
needs that fixed point at every log-density evaluation, so it is solved here by Newton's
method in numba-compiled loops, called from Python (the PyMC engine) and inlined into the
numba-compiled log density (the nutpie engine) alike: one implementation for both.

Both kernels return the fixed point and ``inv(I - J)`` with ``J = dG/ds`` at the fixed
point: the factor of the implicit-function derivative ``ds/dtheta = inv(I - J) dG/dtheta``
that the PyMC model's one symbolic Newton step carries (``inversion.bayes``).

Notes
-----
Mantle-FeO split (mantle iron mass fraction ``F``, oxide factors ``f``)::

    m_i = a_i / (1 + D_i k)   (i != Fe),   M_s = sum_i m_i f_i / (1 - f_Fe F)
    M_c = sum_i a_i - sum_{i != Fe} m_i - F M_s,   G(k) = max(M_c, 0) / M_s

with the analytic derivative ``dG/dk``. Redox split: ``D_Fe`` is the mass partition
coefficient of iron implied by dIW = 2 log10(x_FeO / x_Fe) with ideal mixing and the mean
molar masses of silicate and metal; ``J`` is taken by central differences.
"""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["feo_fixed_point", "redox_fixed_point", "redox_step", "start_state"]

_MAX_ITER = 500
_RTOL = 1e-13
#: Start of the core-to-mantle mass ratio k (Earth-like planets have k ~ 0.5).
K_START = 0.5


@numba.njit(cache=True)
def start_state(redox: bool, level: float) -> np.ndarray:
    """Start of the fixed-point iteration: ``[k]``, or ``[k, D_Fe]`` for the redox split
    with ``D_Fe = 10**(-dIW/2) * 50/55`` (mean molar masses of silicate and metal of
    about 50 and 55 g/mol, the same start as :func:`inversion.model._core_split`)."""
    if redox:
        s = np.empty(2)
        s[0] = K_START
        s[1] = 10.0 ** (-level / 2.0) * 50.0 / 55.0
        return s
    s = np.empty(1)
    s[0] = K_START
    return s


@numba.njit(cache=True)
def _feo_g(a: np.ndarray, D: np.ndarray, f: np.ndarray, fe: int, F: float, k: float
           ) -> tuple[float, float]:
    """G(k) and dG/dk of the mantle-FeO split."""
    c = 1.0 / (1.0 - f[fe] * F)
    A = 0.0
    us = 0.0
    ufs = 0.0
    dus = 0.0
    dufs = 0.0
    for i in range(a.size):
        A += a[i]
        if i == fe:
            continue
        t = 1.0 / (1.0 + D[i] * k)
        dt = -D[i] * t * t
        us += a[i] * t
        ufs += a[i] * f[i] * t
        dus += a[i] * dt
        dufs += a[i] * f[i] * dt
    M_s = c * ufs
    M_c = A - us - F * M_s
    if not M_c > 0.0:
        return 0.0, 0.0
    dM_s = c * dufs
    dM_c = -dus - F * dM_s
    return M_c / M_s, (dM_c * M_s - M_c * dM_s) / (M_s * M_s)


@numba.njit(cache=True)
def feo_fixed_point(a: np.ndarray, D: np.ndarray, f: np.ndarray, fe: int, F: float,
                    k0: float = K_START, max_iter: int = _MAX_ITER, rtol: float = _RTOL
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Fixed point of the mantle-FeO core split by scalar Newton iteration.

    Parameters
    ----------
    a : ndarray (n,)
        Bulk masses per unit mass of the reference element.
    D : ndarray (n,)
        Effective mass partition coefficients (metal/silicate).
    f : ndarray (n,)
        Oxide-to-element mass factors.
    fe : int
        Index of iron.
    F : float
        Mantle iron mass fraction.
    k0 : float
        Start (warm start from a neighbouring point where known).

    Returns
    -------
    s : ndarray (1,)
        ``[k]``, the core-to-mantle mass ratio.
    minv : ndarray (1, 1)
        ``1 / (1 - dG/dk)``.
    """
    k = k0
    dg = 0.0
    for _ in range(max_iter):
        g, dg = _feo_g(a, D, f, fe, F, k)
        nxt = k + (g - k) / (1.0 - dg) if dg != 1.0 else g
        if not (nxt >= 0.0 and math.isfinite(nxt)):
            nxt = g
        done = abs(nxt - k) <= rtol * max(abs(k), 1e-300)
        k = nxt
        if done:
            break
    s = np.empty(1)
    s[0] = k
    minv = np.empty((1, 1))
    minv[0, 0] = 1.0 / (1.0 - dg)
    return s, minv


@numba.njit(cache=True)
def redox_step(a: np.ndarray, D: np.ndarray, f: np.ndarray, aw: np.ndarray,
               cations: np.ndarray, fe: int, dIW: float, k: float, d_fe: float
               ) -> tuple[float, float]:
    """One step G(s) of the redox (dIW) core split from the state ``(k, D_Fe)``."""
    M_s = 0.0
    M_c = 0.0
    mol_sil = 0.0
    mol_met = 0.0
    for i in range(a.size):
        Di = d_fe if i == fe else D[i]
        m = a[i] / (1.0 + Di * k)
        core = a[i] - m
        M_s += m * f[i]
        M_c += core
        mol_sil += m / (aw[i] * cations[i])
        if core > 0.0:
            mol_met += core / aw[i]
    mbar_met = M_c / max(mol_met, 1e-300) if mol_met > 0.0 else aw[fe]
    nxt_d = 10.0 ** (-dIW / 2.0) * (M_s / mol_sil) / mbar_met
    return max(M_c, 0.0) / M_s, nxt_d


@numba.njit(cache=True)
def _redox_g_j(a, D, f, aw, cations, fe, dIW, s):
    G = np.empty(2)
    G[0], G[1] = redox_step(a, D, f, aw, cations, fe, dIW, s[0], s[1])
    J = np.empty((2, 2))
    for j in range(2):
        h = 1e-6 * max(abs(s[j]), 1e-6)
        up = s.copy()
        dn = s.copy()
        up[j] += h
        dn[j] -= h
        u0, u1 = redox_step(a, D, f, aw, cations, fe, dIW, up[0], up[1])
        d0, d1 = redox_step(a, D, f, aw, cations, fe, dIW, dn[0], dn[1])
        J[0, j] = (u0 - d0) / (2.0 * h)
        J[1, j] = (u1 - d1) / (2.0 * h)
    return G, J


@numba.njit(cache=True)
def _inv_i_minus(J: np.ndarray) -> np.ndarray:
    """inv(I - J) of a 2 x 2 matrix (NaN when singular)."""
    a11 = 1.0 - J[0, 0]
    a12 = -J[0, 1]
    a21 = -J[1, 0]
    a22 = 1.0 - J[1, 1]
    det = a11 * a22 - a12 * a21
    out = np.empty((2, 2))
    if det == 0.0:
        out[:] = np.nan
        return out
    out[0, 0] = a22 / det
    out[0, 1] = -a12 / det
    out[1, 0] = -a21 / det
    out[1, 1] = a11 / det
    return out


@numba.njit(cache=True)
def redox_fixed_point(a: np.ndarray, D: np.ndarray, f: np.ndarray, aw: np.ndarray,
                      cations: np.ndarray, fe: int, dIW: float, s0: np.ndarray,
                      max_iter: int = _MAX_ITER, rtol: float = _RTOL
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Fixed point of the redox core split by two-dimensional Newton iteration.

    Falls back to a plain fixed-point step when a Newton step is singular or leaves the
    physical range (``k >= 0``, ``D_Fe > 0``).

    Parameters
    ----------
    a, D, f : ndarray (n,)
        As in :func:`feo_fixed_point`.
    aw : ndarray (n,)
        Atomic weights [g/mol].
    cations : ndarray (n,)
        Cations per formula unit of each element's oxide.
    fe : int
        Index of iron.
    dIW : float
        Redox state relative to the iron-wüstite buffer.
    s0 : ndarray (2,)
        Start ``[k, D_Fe]``.

    Returns
    -------
    s : ndarray (2,)
        ``[k, D_Fe]``.
    minv : ndarray (2, 2)
        ``inv(I - J)`` at the fixed point.
    """
    s = s0.copy()
    G, J = _redox_g_j(a, D, f, aw, cations, fe, dIW, s)
    for _ in range(max_iter):
        minv = _inv_i_minus(J)
        r0 = G[0] - s[0]
        r1 = G[1] - s[1]
        nxt = np.empty(2)
        nxt[0] = s[0] + minv[0, 0] * r0 + minv[0, 1] * r1
        nxt[1] = s[1] + minv[1, 0] * r0 + minv[1, 1] * r1
        if not (math.isfinite(nxt[0]) and math.isfinite(nxt[1]) and nxt[0] >= 0.0
                and nxt[1] > 0.0):
            nxt[:] = G
        done = (abs(nxt[0] - s[0]) <= rtol * max(abs(s[0]), 1e-300)
                and abs(nxt[1] - s[1]) <= rtol * max(abs(s[1]), 1e-300))
        s = nxt
        G, J = _redox_g_j(a, D, f, aw, cations, fe, dIW, s)
        if done:
            break
    return s, _inv_i_minus(J)
