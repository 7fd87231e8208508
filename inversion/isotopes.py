"""Isotope constraints of one hypothesis: reachable intervals, windows, feasibility.

A hypothesis mixes its building blocks (R-basis weights ``u_k`` on the simplex, R the
reference element) and, when the case has one, a late component whose R-basis weight
``v`` is capped at ``v_max``. For an anomaly ``eps`` carried by element e
(docs/model.md section 6)::

    eps_planet(u) = sum_k u_k q_k eps_k / sum_k u_k q_k,     q_k = c_k,e / c_k,R

(the sum runs over the blocks and the late component). ``eps_planet`` is a
linear-fractional function of ``u`` with a positive denominator, so on the polytope
``{u >= 0, sum u = 1, u_late <= v_max}`` its extremes are at vertices: each block alone,
and each block with the late component at its cap. :func:`reachable_intervals` evaluates
those vertices; :func:`feasibility_report` names the systems that fail on their own and,
by linear programming on the linearised windows, the combinations that fail only
together; :func:`window_halfwidth` gives the observation window widened by the
end-members' own uncertainties.

References
----------
Dauphas N. (2017) The isotopic nature of the Earth's accreting material through time.
Nature 541, 521-524 (the carrier-weighted mass balance of isotope anomalies).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.optimize import linprog

from .model import Problem

__all__ = [
    "FeasibilityReport",
    "late_weight_bound",
    "reachable_intervals",
    "effective_sigma",
    "window_halfwidth",
    "conservative_sigma",
    "feasibility_report",
    "WINDOWS",
    "figure_data",
]


def _check_single(p: Problem) -> None:
    if p.Q.ndim != 2:
        raise ValueError("one hypothesis at a time: pass p.subset(names), not a stacked "
                         "problem")


def late_weight_bound(p: Problem, M_s: float | None = None) -> float:
    """Upper bound ``v_max`` of the late component's R-basis weight.

    Parameters
    ----------
    p : Problem
        One hypothesis (``Q`` of shape (K, n)).
    M_s : float, optional
        Silicate mass per unit mass of R before late accretion (``forward(...)["M_s"]``;
        ``fit`` uses the current iterate's). When omitted, an upper bound is used:
        the largest over the blocks of the silicate mass per unit R with every element
        in the silicate as its oxide (no core, no volatile loss; with a fixed mantle FeO,
        the non-iron oxides divided by ``1 - f_Fe * F``).

    Returns
    -------
    float
        ``v_max = lam_max c_late_R / ((1 - lam_max) c_R + lam_max c_late_R)`` with
        ``c_R = 1 / M_s`` the mantle's concentration of R [kg/kg]; 0 without a late
        component.

    Notes
    -----
    ``v_max`` grows as ``c_R`` falls, so the bound on ``M_s`` (a lower bound on ``c_R``)
    gives the largest late weight any mixture can reach: intervals computed with it can
    only be wider than the true ones, and a constraint reported as failing with it fails
    for every admissible late fraction. The bound assumes the volatility factors relative
    to R are at most 1; with R = Mg the refractory Al, Ca, Ti oxides (a few percent of a
    mantle) can exceed that slightly when Mg itself is depleted.
    """
    _check_single(p)
    if p.late_name is None or p.late_max_fraction <= 0:
        return 0.0
    if M_s is None:
        f = p.oxide_factor
        fe = p.fe_index
        if p.mantle_Fe is not None:
            mask = np.ones(f.size)
            mask[fe] = 0.0
            M_s = float(np.max((p.Q * f * mask).sum(axis=1)) / (1.0 - f[fe] * p.mantle_Fe))
        else:
            M_s = float(np.max((p.Q * f).sum(axis=1)))
    lam = p.late_max_fraction
    c_R = 1.0 / float(M_s)
    return float(lam * p.c_late_R / ((1.0 - lam) * c_R + lam * p.c_late_R))


def _vertices(p: Problem, v_max: float) -> np.ndarray:
    """Vertices of {u >= 0, sum u = 1, u_late <= v_max}: rows of length K (+1)."""
    K = len(p.components)
    eye = np.eye(K)
    if p.late_name is None:
        return eye
    blocks = np.hstack([eye, np.zeros((K, 1))])
    capped = np.hstack([(1.0 - v_max) * eye, np.full((K, 1), v_max)])
    return np.vstack([blocks, capped]) if v_max > 0 else blocks


def _columns(p: Problem, iso: dict[str, Any]) -> tuple[np.ndarray, ...]:
    """Per-column (blocks, then the late component) eps, q, sigma_eps, relative sigma_q."""
    eps = np.asarray(iso["eps"], float)
    q = np.asarray(iso["q_carrier"], float)
    K = eps.size
    s = np.asarray(iso.get("eps_sigma", np.zeros(K)), float)
    r = np.asarray(iso.get("q_carrier_rel_sigma", np.zeros(K)), float)
    if p.late_name is not None:
        eps = np.append(eps, iso["eps_late"])
        q = np.append(q, iso["q_late"])
        s = np.append(s, iso.get("eps_sigma_late", 0.0))
        r = np.append(r, iso.get("q_carrier_rel_sigma_late", 0.0))
    return eps, q, s, r


def reachable_intervals(p: Problem, *, M_s: float | None = None
                        ) -> dict[str, tuple[float, float]]:
    """Interval of ``eps_planet`` over all mixtures of the hypothesis's blocks.

    Parameters
    ----------
    p : Problem
        One hypothesis (``p.subset(names)``).
    M_s : float, optional
        Passed to :func:`late_weight_bound` (the late component's cap).

    Returns
    -------
    dict
        System name -> ``(lo, hi)`` [permil or epsilon]: the extremes over the vertices
        (each block alone; each block with the late component at ``v_max``).
    """
    _check_single(p)
    verts = _vertices(p, late_weight_bound(p, M_s))
    out = {}
    for iso in p.isotopes:
        eps, q, _, _ = _columns(p, iso)
        uq = verts * q[None, :]
        vals = (uq @ eps) / uq.sum(axis=1)
        out[iso["name"]] = (float(vals.min()), float(vals.max()))
    return out


def effective_sigma(iso: dict[str, Any], u: np.ndarray) -> float:
    """Observation 1-sigma widened by the end-members' uncertainties at weights ``u``.

    Parameters
    ----------
    iso : dict
        One entry of ``Problem.isotopes``.
    u : array_like, shape (K,) or (K + 1,)
        R-basis weights of the blocks, then (optionally) of the late component.

    Returns
    -------
    float
        ``sigma_eff`` [permil or epsilon].

    Notes
    -----
    With ``phi_k = u_k q_k / sum_j u_j q_j`` (the share of the carrier element that
    column k supplies) and ``eps_mix = sum_k phi_k eps_k``, first-order propagation of
    independent errors in ``eps_k`` (1-sigma ``s_k``) and in ``q_k`` (relative 1-sigma
    ``r_k``; ``d eps_mix / d ln q_k = phi_k (eps_k - eps_mix)``) gives::

        sigma_eff**2 = sigma_obs**2 + sum_k phi_k**2 (s_k**2 + r_k**2 (eps_k - eps_mix)**2)

    Example: two blocks, q = (1, 3), u = (0.5, 0.5): phi = (0.25, 0.75); eps = (2.0,
    -0.4): eps_mix = 0.2; s = (0.2, 0.08), r = (0.1, 0), sigma_obs = 0.05:
    sigma_eff**2 = 0.0025 + 0.0625 (0.04 + 0.01 * 1.8**2) + 0.5625 * 0.0064 = 0.010625,
    sigma_eff = 0.1031.
    """
    u = np.asarray(u, float)
    eps = np.asarray(iso["eps"], float)
    q = np.asarray(iso["q_carrier"], float)
    K = eps.size
    s = np.asarray(iso.get("eps_sigma", np.zeros(K)), float)
    r = np.asarray(iso.get("q_carrier_rel_sigma", np.zeros(K)), float)
    if u.size == K + 1:
        eps = np.append(eps, iso["eps_late"])
        q = np.append(q, iso["q_late"])
        s = np.append(s, iso.get("eps_sigma_late", 0.0))
        r = np.append(r, iso.get("q_carrier_rel_sigma_late", 0.0))
    elif u.size != K:
        raise ValueError(f"u has {u.size} weights; expected {K} (blocks) or {K + 1} "
                         "(blocks and the late component)")
    uq = u * q
    phi = uq / uq.sum()
    mix = float(phi @ eps)
    var = float(iso["sigma"]) ** 2 + float(np.sum(phi ** 2 * (s ** 2 + r ** 2
                                                               * (eps - mix) ** 2)))
    return float(np.sqrt(var))


def window_halfwidth(iso: dict[str, Any], u: np.ndarray, *, n_sigma: float = 2.0
                     ) -> float:
    """Half-width of the isotope window at weights ``u``: ``n_sigma * sigma_eff``.

    Parameters
    ----------
    iso : dict
        One entry of ``Problem.isotopes``.
    u : array_like, shape (K,) or (K + 1,)
        R-basis weights (blocks, then optionally the late component).
    n_sigma : float
        Window in units of ``sigma_eff`` (``Problem.isotope_window_sigma``).

    Returns
    -------
    float
        Half-width [permil or epsilon]; ``sigma_eff`` as in :func:`effective_sigma`.
    """
    return float(n_sigma) * effective_sigma(iso, u)


def conservative_sigma(p: Problem, iso: dict[str, Any], *, M_s: float | None = None
                       ) -> float:
    """An upper bound of ``sigma_eff`` over every mixture of the hypothesis.

    Notes
    -----
    ``sum_k phi_k**2 s_k**2 <= max_k s_k**2`` (``phi`` on the simplex) and, since
    ``|eps_k - eps_mix| <= (1 - phi_k) D`` with ``D = max_k eps_k - min_k eps_k`` over
    the columns (blocks and late component) and ``sum_k phi_k**2 (1 - phi_k)**2 <= c``
    (``c = 1/8`` for two columns, where the sum is ``2 phi**2 (1 - phi)**2``; ``c = 1/4``
    otherwise, from ``phi (1 - phi) <= 1/4`` and ``sum_k phi_k (1 - phi_k) <= 1``)::

        sigma_max**2 = sigma_obs**2 + max_k s_k**2 + c max_k r_k**2 D**2

    A window of ``n_sigma * sigma_max`` is never narrower than the one at any weights,
    so a system that misses it is out of reach whatever the mixture.
    """
    eps, _, s, r = _columns(p, iso)
    if p.late_name is not None and late_weight_bound(p, M_s) <= 0:
        eps, s, r = eps[:-1], s[:-1], r[:-1]
    c = 0.125 if eps.size == 2 else 0.25
    var = float(iso["sigma"]) ** 2 + float(np.max(s ** 2)) + c * float(np.max(r ** 2)) * (
        float(eps.max() - eps.min())) ** 2
    return float(np.sqrt(var))


@dataclass(frozen=True)
class FeasibilityReport:
    """Which isotope constraints a hypothesis can meet, and which fail, with evidence.

    Attributes
    ----------
    components : tuple of str
        The hypothesis's building blocks.
    feasible : bool
        True when some mixture meets every window (and the extra inequalities).
    intervals : dict
        System -> reachable ``(lo, hi)``.
    windows : dict
        System -> ``(value - half-width, value + half-width)`` used in the test.
    half_widths : dict
        System -> window half-width [permil or epsilon].
    v_max : float
        Cap of the late component's R-basis weight used.
    alone : tuple of str
        Constraints that fail on their own (isotope systems, or ``extra_name``).
    joint : tuple of tuple of str
        Minimal combinations of constraints that each hold alone but fail together.
    messages : tuple of str
        One line per failure, for reports.
    """

    components: tuple[str, ...]
    feasible: bool
    intervals: dict[str, tuple[float, float]]
    windows: dict[str, tuple[float, float]]
    half_widths: dict[str, float]
    v_max: float
    alone: tuple[str, ...] = field(default=())
    joint: tuple[tuple[str, ...], ...] = field(default=())
    messages: tuple[str, ...] = field(default=())

    def lines(self) -> list[str]:
        """The messages as a list (empty when feasible)."""
        return list(self.messages)


def _and(names: tuple[str, ...]) -> str:
    return names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]


def _lp_feasible(rows: list[np.ndarray], h: list[float], m: int, late: bool,
                 v_max: float) -> bool:
    """Is there u >= 0, sum u = 1, u_late <= v_max, rows @ u <= h?"""
    bounds = [(0.0, None)] * m
    if late:
        bounds[-1] = (0.0, v_max)
    A = np.array(rows) if rows else None
    b = np.array(h) if rows else None
    # the windows' rows are scaled by the carrier ratios: normalise each row so the
    # solver's absolute tolerance means the same for every system
    if A is not None:
        scale = np.maximum(np.abs(A).max(axis=1), 1e-300)
        A, b = A / scale[:, None], b / scale
    res = linprog(np.zeros(m), A_ub=A, b_ub=b, A_eq=np.ones((1, m)), b_eq=[1.0],
                  bounds=bounds, method="highs")
    return res.status == 0


#: How :func:`feasibility_report` sets each window's half-width.
WINDOWS = ("conservative", "observed", "at_weights")
_WINDOW_NOTE = {"conservative": " with end-member errors", "observed": "",
                "at_weights": " at the current weights"}


def feasibility_report(p: Problem, *, window: str = "conservative",
                       u: np.ndarray | None = None, M_s: float | None = None,
                       extra: tuple[np.ndarray, np.ndarray] | None = None,
                       extra_name: str = "iron budget") -> FeasibilityReport:
    """Name the isotope constraints one hypothesis cannot meet, alone or together.

    Parameters
    ----------
    p : Problem
        One hypothesis (``p.subset(names)``).
    window : {"conservative", "observed", "at_weights"}
        Half-width of each window, in units of ``p.isotope_window_sigma``:
        ``conservative`` (default) the widest ``sigma_eff`` any mixture can have
        (:func:`conservative_sigma`), so a failure reported holds whatever the weights
        and the end-members' errors; ``observed`` the observation's own 1-sigma (the
        end-members taken as exact); ``at_weights`` ``sigma_eff(u)`` at the weights ``u``
        (:func:`window_halfwidth`), as the fit uses them.
    u : array_like, optional
        R-basis weights (K, or K + 1 with the late component); required by
        ``window="at_weights"`` and refused otherwise.
    M_s : float, optional
        Silicate mass per unit R for the late component's cap (:func:`late_weight_bound`).
    extra : (G, h), optional
        More inequalities ``G u <= h`` on the same weights (G of shape (g, K) or
        (g, K + 1) with a late component), e.g. the iron budget of ``fit``'s design at
        fixed core state; treated as one more constraint named ``extra_name``.
    extra_name : str
        Name of the extra constraint set in the messages.

    Returns
    -------
    FeasibilityReport

    Notes
    -----
    A system fails alone when its reachable interval (:func:`reachable_intervals`) and
    its window are disjoint. The joint test is a linear program: with the window
    ``[value - w, value + w]`` the condition ``|eps_planet(u) - value| <= w`` is, after
    multiplying by the positive ``sum_k u_k q_k``, the pair of linear inequalities::

        sum_k u_k q_k (eps_k - value - w) <= 0,   sum_k u_k q_k (eps_k - value + w) >= 0

    Combinations of constraints that each hold alone are tested by increasing size
    (scipy's HiGHS); only minimal failing combinations are reported.
    """
    _check_single(p)
    if window not in WINDOWS:
        raise ValueError(f"window must be one of {list(WINDOWS)}, not {window!r}")
    if (window == "at_weights") != (u is not None):
        raise ValueError("give u exactly when window='at_weights'")
    late = p.late_name is not None
    K = len(p.components)
    m = K + late
    v_max = late_weight_bound(p, M_s)
    intervals = reachable_intervals(p, M_s=M_s)
    blocks = "+".join(p.components)
    where = (f"{blocks} (with {p.late_name} up to {p.late_max_fraction:g} of the mantle)"
             if late and v_max > 0 else blocks)
    n_sig = p.isotope_window_sigma
    half, windows = {}, {}
    rows: dict[str, tuple[list[np.ndarray], list[float]]] = {}
    for iso in p.isotopes:
        name = iso["name"]
        if window == "at_weights":
            w = window_halfwidth(iso, np.asarray(u, float), n_sigma=n_sig)
        elif window == "observed":
            w = n_sig * float(iso["sigma"])
        else:
            w = n_sig * conservative_sigma(p, iso, M_s=M_s)
        half[name] = w
        windows[name] = (iso["value"] - w, iso["value"] + w)
        eps, q, _, _ = _columns(p, iso)
        rows[name] = ([q * (eps - iso["value"] - w), -q * (eps - iso["value"] + w)],
                      [0.0, 0.0])
    alone: list[str] = []
    messages: list[str] = []
    for iso in p.isotopes:
        name = iso["name"]
        lo, hi = intervals[name]
        if windows[name][1] < lo or windows[name][0] > hi:
            alone.append(name)
            messages.append(f"{name}: observed {iso['value']:.3g} +- {half[name]:.2g} "
                            f"({n_sig:g} sigma window{_WINDOW_NOTE[window]}); {where} "
                            f"reaches [{lo:.2f}, {hi:.2f}]")
    if extra is not None:
        G, h = (np.atleast_2d(np.asarray(extra[0], float)),
                np.atleast_1d(np.asarray(extra[1], float)))
        if late and G.shape[1] == K:
            G = np.hstack([G, np.zeros((G.shape[0], 1))])
        if G.shape[1] != m or G.shape[0] != h.size:
            raise ValueError(f"extra G must have {m} columns and as many rows as h")
        rows[extra_name] = (list(G), list(h))
        if not _lp_feasible(list(G), list(h), m, late, v_max):
            alone.append(extra_name)
            messages.append(f"{extra_name}: no mixture of {where} meets it, without any "
                            "isotope constraint")
    candidates = [n for n in rows if n not in alone]
    joint: list[tuple[str, ...]] = []
    for size in range(2, len(candidates) + 1):
        for combo in itertools.combinations(candidates, size):
            if any(set(j) <= set(combo) for j in joint):
                continue
            rs = [r for n in combo for r in rows[n][0]]
            hs = [x for n in combo for x in rows[n][1]]
            if not _lp_feasible(rs, hs, m, late, v_max):
                joint.append(combo)
                messages.append(f"{_and(combo)}: each can be met alone, but no mixture of "
                                f"{where} meets them together")
    return FeasibilityReport(
        components=tuple(p.components), feasible=not alone and not joint,
        intervals=intervals, windows=windows, half_widths=half, v_max=v_max,
        alone=tuple(alone), joint=tuple(joint), messages=tuple(messages))


def figure_data(p: Problem, u: np.ndarray | None = None, *, label: str | None = None,
                singles: bool = True) -> dict[str, Any]:
    """What the isotope figure of a report shows, as plain JSON-ready numbers.

    Parameters
    ----------
    p : Problem
        One hypothesis (``p.subset(names)`` or a case's problem with all candidates).
    u : array_like, optional
        The fitted R-basis weights (K, or K + 1 with the late component last). With them
        the window is ``isotope_window_sigma * sigma_eff`` at these weights
        (:func:`effective_sigma`) and the fitted anomalies are given; without them (an
        infeasible or unfitted hypothesis) the window uses :func:`conservative_sigma`.
    label : str, optional
        Row label of the hypothesis (default: its blocks joined by ``+``).
    singles : bool
        Also give one row per block alone (with the late component up to its cap).

    Returns
    -------
    dict
        ``systems``: name -> {``value``, ``sigma``, ``half_width``, ``window``};
        ``reachable``: row label -> {name -> [lo, hi]} (:func:`reachable_intervals`);
        ``predicted``: row label -> {name -> fitted anomaly} (only with ``u``).
    """
    _check_single(p)
    label = label or "+".join(p.components)
    n = float(p.isotope_window_sigma)
    systems: dict[str, Any] = {}
    predicted: dict[str, float] = {}
    for iso in p.isotopes:
        if u is not None:
            uu = np.asarray(u, float)
            half, how = window_halfwidth(iso, uu, n_sigma=n), "at the fitted weights"
            eps, q, _, _ = _columns(p, iso)
            m = min(uu.size, eps.size)
            predicted[iso["name"]] = float((uu[:m] * q[:m]) @ eps[:m] / (uu[:m] @ q[:m]))
        else:
            half, how = n * conservative_sigma(p, iso), "largest over the mixtures"
        systems[iso["name"]] = {"value": float(iso["value"]), "sigma": float(iso["sigma"]),
                                "half_width": float(half),
                                "window": f"+-{n:g} sigma_eff, {how}"}
    reach = {label: {k: [lo, hi] for k, (lo, hi) in reachable_intervals(p).items()}}
    if singles and len(p.components) > 1:
        for name in p.components:
            reach[name] = {k: [lo, hi] for k, (lo, hi)
                           in reachable_intervals(p.subset([name])).items()}
    out: dict[str, Any] = {"systems": systems, "reachable": reach}
    if predicted:
        out["predicted"] = {label: predicted}
    return out
