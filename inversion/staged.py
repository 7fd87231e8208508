"""Two-stage accretion read from isotope anomalies: early and late building-block mixtures.

A separate inference beside the forward model (whose default path is one mixture): the
planet accretes a mass fraction ``1 - f`` of an early mixture ``x1`` and then ``f`` of a
late mixture ``x2`` (mass fractions of the same K building blocks). Of the carrier
element e of an anomaly, the fraction delivered by stage s that stays in the mantle is
``rho_s,e``: 1 for a lithophile element; ``1 / (1 + D_e k)`` for a siderophile element
that equilibrated with the core (``D_e`` the metal/silicate mass partition coefficient,
``k`` the core/mantle mass ratio; :func:`retention`); 1 for material added after the last
equilibration. The mantle's anomaly is the carrier-weighted balance of the two stages::

    eps_e = [(1-f) rho_1e sum_k x1_k c_ke eps_ke + f rho_2e sum_k x2_k c_ke eps_ke]
            / [(1-f) rho_1e sum_k x1_k c_ke + f rho_2e sum_k x2_k c_ke]

so lithophile anomalies constrain the whole planet's mixture and siderophile ones weight
the late stage by their partitioning (Dauphas 2017).

From a case file (``[accretion] stages = 2``; :func:`case_systems`, :func:`fit_case`):
the early stage's metal equilibrates with its silicate, so the mantle keeps
``rho_1e = 1 / (1 + D_e k)`` of the early carrier; the late stage's metal then
equilibrates with the whole mantle, which scales the early remnant and the late
delivery by the same factor, so that factor cancels in the anomaly and ``rho_2e = 1``.
``D_e`` is the case's effective partition coefficient (``[core] D`` or the library's),
``k = cmf / (1 - cmf)`` the core/mantle mass ratio (``[accretion] core_mass_fraction`` or
the convex fit's). The late-veneer component of the case is not part of this inference.

:func:`fit_staged` finds ``x1`` and ``x2`` by maximum likelihood (Gaussian, with the
end-members' anomaly uncertainties added to each observation's variance at the current
weights) and compares them with one mixture throughout (``x1 = x2``) by BIC and a
likelihood-ratio test.

References
----------
Dauphas N. (2017) The isotopic nature of the Earth's accreting material through time.
Nature 541, 521-524.
Kass R. E., Raftery A. E. (1995) Bayes factors. J. Am. Stat. Assoc. 90, 773-795 (BIC).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import optimize, stats

__all__ = ["IsotopeSystem", "StagedResult", "retention", "stage_prediction", "fit_staged",
           "case_systems", "fit_case", "min_systems"]


@dataclass(frozen=True)
class IsotopeSystem:
    """One anomaly with its carrier, per building block, and its mantle retention.

    Attributes
    ----------
    name : str
        e.g. ``e100Ru``.
    value, sigma : float
        Observed anomaly of the mantle and its 1-sigma [permil or epsilon].
    eps, eps_sigma : tuple of float
        The blocks' anomalies and their 1-sigma (K each).
    carrier : tuple of float
        The blocks' carrier concentrations [kg/kg] (K).
    rho_early, rho_late : float
        Fraction of the carrier delivered by each stage that stays in the mantle.
    """

    name: str
    value: float
    sigma: float
    eps: tuple[float, ...]
    eps_sigma: tuple[float, ...]
    carrier: tuple[float, ...]
    rho_early: float = 1.0
    rho_late: float = 1.0


def retention(D: float, k: float) -> float:
    """Mantle fraction of an element after metal/silicate equilibrium: ``1 / (1 + D k)``.

    Parameters
    ----------
    D : float
        Metal/silicate mass partition coefficient.
    k : float
        Core/mantle mass ratio (Earth about 0.48).
    """
    return 1.0 / (1.0 + float(D) * float(k))


def _shares(s: IsotopeSystem, x1: np.ndarray, x2: np.ndarray, f: float) -> np.ndarray:
    """Share of the mantle's carrier from each (stage, block): shape (2, K)."""
    c = np.asarray(s.carrier, float)
    a = np.vstack([(1.0 - f) * s.rho_early * x1 * c, f * s.rho_late * x2 * c])
    return a / a.sum()


def stage_prediction(systems: list[IsotopeSystem], x1: np.ndarray, x2: np.ndarray,
                     f: float) -> tuple[np.ndarray, np.ndarray]:
    """Predicted mantle anomalies and their 1-sigma with end-member errors.

    Returns
    -------
    eps, sigma : ndarray
        One value per system; ``sigma**2 = sigma_obs**2 + sum_k phi_k**2 s_k**2`` with
        ``phi_k`` block k's share of the mantle's carrier, both stages' shares added
        (the two stages draw on the same end-member, so its error is common to both).
    """
    x1 = np.asarray(x1, float)
    x2 = np.asarray(x2, float)
    eps, sig = [], []
    for s in systems:
        phi = _shares(s, x1, x2, f)
        e = np.asarray(s.eps, float)
        eps.append(float((phi * e).sum()))
        per_block = phi.sum(axis=0)
        sig.append(float(np.sqrt(s.sigma ** 2 + np.sum(per_block ** 2
                                                       * np.asarray(s.eps_sigma) ** 2))))
    return np.array(eps), np.array(sig)


def _nll(systems, x1, x2, f) -> float:
    eps, sig = stage_prediction(systems, x1, x2, f)
    obs = np.array([s.value for s in systems])
    return float(np.sum(((obs - eps) / sig) ** 2 + 2.0 * np.log(sig)))


def _softmax(z: np.ndarray) -> np.ndarray:
    z = np.concatenate([[0.0], z])
    e = np.exp(z - z.max())
    return e / e.sum()


def _minimise(fun, n_free: int, K: int, starts: int, rng: np.random.Generator):
    best = None
    for i in range(starts):
        z0 = rng.normal(scale=1.5, size=n_free) if i else np.zeros(n_free)
        res = optimize.minimize(fun, z0, method="Nelder-Mead",
                                options={"xatol": 1e-7, "fatol": 1e-10,
                                         "maxiter": 4000 * max(1, n_free)})
        if best is None or res.fun < best.fun:
            best = res
    return best


@dataclass(frozen=True)
class StagedResult:
    """Early and late mixtures, the single-mixture alternative, and their comparison.

    Attributes
    ----------
    components : tuple of str
    late_fraction : float
        ``f``, the mass fraction accreted in the late stage (fixed).
    early, late : dict
        Block -> mass fraction of the early and late mixtures.
    single : dict
        Block -> mass fraction of the best single mixture.
    m2ll_staged, m2ll_single : float
        -2 log likelihood (up to a constant) of each model.
    bic_staged, bic_single : float
        ``-2 log L + n_params ln n_systems`` (n_params 2(K-1) and K-1).
    lr_pvalue : float
        Likelihood-ratio test of one mixture against two (chi2, K-1 degrees of freedom).
    preferred : str
        ``"staged"`` or ``"single"``: the lower BIC.
    predicted_staged, predicted_single : dict
        System -> predicted anomaly.
    """

    components: tuple[str, ...]
    late_fraction: float
    early: dict[str, float]
    late: dict[str, float]
    single: dict[str, float]
    m2ll_staged: float
    m2ll_single: float
    bic_staged: float
    bic_single: float
    lr_pvalue: float
    preferred: str
    predicted_staged: dict[str, float]
    predicted_single: dict[str, float]

    def to_dataframe(self) -> pd.DataFrame:
        """Mixtures as a table: one row per block, columns early, late, single."""
        return pd.DataFrame({"early": self.early, "late": self.late,
                             "single": self.single}).rename_axis("component")


def fit_staged(systems: list[IsotopeSystem], components: list[str] | tuple[str, ...], *,
               late_fraction: float, seed: int = 0, starts: int = 6) -> StagedResult:
    """Early and late mixtures from the anomalies, and the comparison with one mixture.

    Parameters
    ----------
    systems : list of IsotopeSystem
        At least ``2 (K - 1) + 1`` systems, lithophile and siderophile.
    components : sequence of str
        The K building blocks (order of each system's arrays).
    late_fraction : float
        Mass fraction accreted in the late stage, in (0, 1).
    seed : int
        Seed of the random restarts.
    starts : int
        Optimiser starts per model (the first from equal weights).

    Returns
    -------
    StagedResult

    Notes
    -----
    The mixtures are parametrised by a softmax (each on its simplex) and the negative
    log likelihood ``sum ((obs - eps) / sigma)**2 + 2 ln sigma`` is minimised by
    Nelder-Mead from several starts. Weights that no system constrains (e.g. the late
    mixture when every carrier is lithophile) are not identifiable; the comparison
    then prefers the single mixture.
    """
    K = len(components)
    if not 0.0 < late_fraction < 1.0:
        raise ValueError("late_fraction must lie in (0, 1)")
    for s in systems:
        if len(s.eps) != K or len(s.carrier) != K or len(s.eps_sigma) != K:
            raise ValueError(f"{s.name}: give one value per building block ({K})")
    n = len(systems)
    if n < 2 * (K - 1) + 1:
        raise ValueError(f"{n} systems cannot constrain two mixtures of {K} blocks; "
                         f"give at least {2 * (K - 1) + 1}")
    rng = np.random.default_rng(seed)
    f = float(late_fraction)

    def staged(z):
        return _nll(systems, _softmax(z[:K - 1]), _softmax(z[K - 1:]), f)

    def single(z):
        x = _softmax(z)
        return _nll(systems, x, x, f)

    r1 = _minimise(single, K - 1, K, starts, rng)
    r2 = _minimise(staged, 2 * (K - 1), K, starts, rng)
    # the staged model contains the single one: start it there too
    r2b = optimize.minimize(staged, np.concatenate([r1.x, r1.x]), method="Nelder-Mead",
                            options={"xatol": 1e-7, "fatol": 1e-10,
                                     "maxiter": 8000 * K})
    if r2b.fun < r2.fun:
        r2 = r2b
    x1, x2 = _softmax(r2.x[:K - 1]), _softmax(r2.x[K - 1:])
    xs = _softmax(r1.x)
    m2_st = min(float(r2.fun), float(r1.fun))
    m2_si = float(r1.fun)
    bic_st = m2_st + 2 * (K - 1) * np.log(n)
    bic_si = m2_si + (K - 1) * np.log(n)
    p = float(stats.chi2.sf(max(m2_si - m2_st, 0.0), K - 1))
    names = tuple(components)
    pred_st, _ = stage_prediction(systems, x1, x2, f)
    pred_si, _ = stage_prediction(systems, xs, xs, f)
    return StagedResult(
        components=names, late_fraction=f,
        early=dict(zip(names, map(float, x1), strict=True)),
        late=dict(zip(names, map(float, x2), strict=True)),
        single=dict(zip(names, map(float, xs), strict=True)),
        m2ll_staged=m2_st, m2ll_single=m2_si, bic_staged=float(bic_st),
        bic_single=float(bic_si), lr_pvalue=p,
        preferred="staged" if bic_st < bic_si else "single",
        predicted_staged={s.name: float(v) for s, v in zip(systems, pred_st, strict=True)},
        predicted_single={s.name: float(v) for s, v in zip(systems, pred_si, strict=True)})


def min_systems(K: int) -> int:
    """Isotope systems needed to constrain two mixtures of K blocks: ``2 (K - 1) + 1``."""
    return 2 * (K - 1) + 1


def case_systems(case: Any, *, core_mantle_ratio: float) -> list[IsotopeSystem]:
    """The isotope systems of a case with ``[accretion] stages = 2``, lithophile and
    siderophile, with each block's anomaly, 1-sigma and carrier concentration.

    Parameters
    ----------
    case : inversion.case.Case
    core_mantle_ratio : float
        ``k`` of the siderophile retention ``1 / (1 + D k)`` (early stage; the late
        stage keeps 1, see the module docstring).

    Returns
    -------
    list of IsotopeSystem
        Lithophile systems (``case.isotopes``) first, then the siderophile ones
        (``case.accretion.isotopes``).

    Raises
    ------
    InputError
        A block without a value of an anomaly or without its carrier element (one line,
        naming the case key).
    """
    import components

    from .case import ISOTOPE_CARRIERS, STAGED_ISOTOPE_CARRIERS
    from .exceptions import InputError
    from .model import default_partition

    table = components.isotopes()
    D_lib = default_partition()["D"]
    out = []
    for name, (value, sigma), siderophile in (
            [(n, v, False) for n, v in case.isotopes.items()]
            + [(n, v, True) for n, v in case.accretion.isotopes.items()]):
        carrier = (STAGED_ISOTOPE_CARRIERS if siderophile else ISOTOPE_CARRIERS)[name]
        eps, eps_sig, conc = [], [], []
        for c in case.candidates:
            rows = table[(table["body"] == c.name) & (table["quantity"] == name)]
            if name in c.isotopes:
                e, es = c.isotopes[name]
            elif not rows.empty:
                e, es = float(rows["value"].iloc[0]), float(rows["uncertainty"].iloc[0])
            else:
                raise InputError(f"no {name} value for building block {c.name} in the "
                                 "library; remove the constraint or the candidate, or give "
                                 f"it in a component file as '# {name}: value 1-sigma'",
                                 file=case.path, field=f"isotopes.{name}", value=c.name)
            cval = c.composition.get(carrier, float("nan"))
            if not np.isfinite(cval) or cval <= 0:
                raise InputError(f"building block {c.name} has no {carrier}, the carrier "
                                 f"of {name}; give a component file that holds it",
                                 file=case.path, field=f"isotopes.{name}", value=c.name)
            eps.append(float(e))
            eps_sig.append(float(es) if np.isfinite(es) else 0.0)
            conc.append(float(cval))
        rho = 1.0
        if siderophile:
            D = float(case.core.D.get(carrier, D_lib.get(carrier, 0.0)))
            rho = retention(D, core_mantle_ratio)
        out.append(IsotopeSystem(name=name, value=float(value), sigma=float(sigma),
                                 eps=tuple(eps), eps_sigma=tuple(eps_sig),
                                 carrier=tuple(conc), rho_early=rho, rho_late=1.0))
    return out


def fit_case(case: Any, *, core_mass_fraction: float, seed: int = 0) -> dict[str, Any]:
    """The staged fit of a case, as the JSON-ready ``staged_accretion`` block of fit.json.

    Parameters
    ----------
    case : inversion.case.Case
        With ``[accretion] stages = 2``.
    core_mass_fraction : float
        Sets ``k = cmf / (1 - cmf)`` of the siderophile retention.
    seed : int
        Seed of the optimiser's restarts.

    Returns
    -------
    dict
        ``late_stage_fraction``, ``core_mass_fraction``, ``core_mantle_ratio``,
        ``retention_early`` (system -> rho), ``observed``, the ``early``, ``late`` and
        ``single`` mixtures (mass fractions), each stage's anomaly alone
        (``early_alone``, ``late_alone``), ``predicted_staged``, ``predicted_single``,
        ``m2ll_*``, ``bic_*``, ``lr_pvalue``, ``preferred`` and ``model``.
    """
    k = core_mass_fraction / (1.0 - core_mass_fraction)
    systems = case_systems(case, core_mantle_ratio=k)
    res = fit_staged(systems, case.candidate_names,
                     late_fraction=float(case.accretion.late_stage_fraction), seed=seed)
    x1 = np.array([res.early[c] for c in res.components])
    x2 = np.array([res.late[c] for c in res.components])
    alone1, _ = stage_prediction(systems, x1, x1, 0.5)
    alone2, _ = stage_prediction(systems, x2, x2, 0.5)
    return {
        "model": "two-stage accretion (inversion/staged.py): early mixture then late "
                 "mixture; siderophile carriers kept 1/(1 + D k) of the early stage, all "
                 "of the late; Gaussian likelihood with end-member errors; compared with "
                 "one mixture throughout by BIC and a likelihood-ratio test",
        "late_stage_fraction": res.late_fraction,
        "core_mass_fraction": float(core_mass_fraction), "core_mantle_ratio": float(k),
        "retention_early": {s.name: s.rho_early for s in systems},
        "observed": {s.name: {"value": s.value, "sigma": s.sigma} for s in systems},
        "early": res.early, "late": res.late, "single": res.single,
        "early_alone": {s.name: float(v) for s, v in zip(systems, alone1, strict=True)},
        "late_alone": {s.name: float(v) for s, v in zip(systems, alone2, strict=True)},
        "predicted_staged": res.predicted_staged,
        "predicted_single": res.predicted_single,
        "m2ll_staged": res.m2ll_staged, "m2ll_single": res.m2ll_single,
        "bic_staged": res.bic_staged, "bic_single": res.bic_single,
        "lr_pvalue": res.lr_pvalue, "preferred": res.preferred,
    }
