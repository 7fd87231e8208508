"""Convex inversion: profile the nonlinear parameters, solve the mixing weights exactly.

For fixed volatility parameters, core-to-mantle mass ratio k and linearisation point, the
final silicate's ratios to R are linear in the weights u = (building blocks, late
component) on the simplex, so the weighted least-squares problem with the isotope
windows, the late-accretion bound and the core-iron budget is a quadratic program
(:mod:`inversion.qp`). The log-space misfit is handled by Gauss-Newton: each pass
linearises log10 around the current model, solves the QP exactly, then recomputes k by
the forward model's fixed point. The volatility parameters are profiled on a grid, then
on zoomed grids around the best point (variable projection).
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
from .volatility import get_form

__all__ = ["FitResult", "fit", "fit_problem", "screen", "Ranking", "FitSettings",
           "SCREEN_SETTINGS", "STATUS_OPTIMAL", "STATUS_INFEASIBLE"]

STATUS_OPTIMAL = "optimal"
STATUS_INFEASIBLE = "infeasible"
_LN10 = math.log(10.0)


@dataclass(frozen=True)
class FitSettings:
    """Settings of the convex inversion (recorded in every result)."""

    passes: int = 5
    zoom_levels: int = 6
    zoom_points: int = 5
    solver: str = "active-set enumeration (exact); cvxpy/CLARABEL above 7 variables"


#: Coarser profile used when screening many hypotheses (the best ones are then re-fitted
#: with the default settings by ``planetmix fit``).
SCREEN_SETTINGS = FitSettings(passes=3, zoom_levels=2)


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
        row: dict[str, Any] = {"components": "+".join(self.components), "status": self.status,
                               "chi2": self.chi2, "aic": self.aic, "bic": self.bic,
                               "n_elements": self.n_elements, "n_params": self.n_params,
                               "late_accretion_fraction": self.late_accretion_fraction,
                               "core_mass_fraction": self.core_mass_fraction}
        row.update({f"w_{k}": v for k, v in self.weights.items()})
        row.update({f"{self.volatility_form}_{k}": v for k, v in self.volatility.items()})
        return pd.DataFrame([row])


def _design(p: Problem, vol: np.ndarray, k: np.ndarray, D_Fe: np.ndarray,
            M_s_prev: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
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
        win = p.isotope_window_sigma * iso["sigma"]
        up = qc * (eps - iso["value"] - win)
        lo = qc * (eps - iso["value"] + win)
        rows.append(up)
        hs.append(np.zeros(B))
        names.append(f"{iso['name']} <= {iso['value'] + win:g}")
        rows.append(-lo)
        hs.append(np.zeros(B))
        names.append(f"{iso['name']} >= {iso['value'] - win:g}")
    G = np.stack(rows, axis=1) if rows else np.zeros((B, 0, A.shape[2]))
    h = np.stack(hs, axis=1) if hs else np.zeros((B, 0))
    return A, G, h, names


def _solve(A: np.ndarray, b: np.ndarray, G: np.ndarray, h: np.ndarray):
    if A.shape[2] <= MAX_ENUMERATED_VARIABLES:
        return solve_batch(A, b, G, h)
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
    for _ in range(passes):
        A, G, h, _names = _design(p, vol, k, D_Fe, M_s)
        Af = A[:, fi, :]
        scale = 1.0 / (m0 * _LN10 * p.sigma[None, :])
        Aw = Af * scale[:, :, None]
        bw = (y_ratio[None, :] - np.log10(m0) + 1.0 / _LN10) / p.sigma[None, :]
        sol = _solve(Aw, bw, G, h)
        ok = sol.feasible
        feasible_any |= ok
        u = np.where(ok[:, None], sol.u, 1.0 / sol.u.shape[1])
        w = u[:, :K]
        sw = w.sum(axis=1, keepdims=True)
        w = np.where(sw > 0, w / np.where(sw > 0, sw, 1.0), 1.0 / K)
        v = u[:, K] if p.late_name is not None else np.zeros(B)
        # the core split does not depend on the late veneer: one forward pass, then mix
        fwd = forward(p, w, vol, 0.0)
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
    f = get_form(form)
    return np.array(list(itertools.product(*f.grid)), dtype=float)


def _zoom(form: str, centre: np.ndarray, step: np.ndarray, n: int) -> np.ndarray:
    """A fixed-size grid of n**p points around ``centre`` (clipped to the bounds)."""
    f = get_form(form)
    axes = []
    for c, s, lo, hi in zip(centre, step, f.lower, f.upper, strict=True):
        axes.append(np.clip(np.linspace(c - s, c + s, n), lo, hi))
    return np.array(list(itertools.product(*axes)))


def _grid_steps(form: str) -> np.ndarray:
    f = get_form(form)
    return np.array([np.max(np.diff(g)) if len(g) > 1 else 1.0 for g in f.grid])


#: Rows (hypotheses x profile points) solved together in one batch.
_BATCH_ROWS = 3000


def _profile_many(p: Problem, subsets: list[tuple[str, ...]], settings: FitSettings
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Profile the volatility parameters of many equal-size hypotheses at once.

    Returns, per hypothesis, all profile points (H, P, p), their chi2 (H, P) and
    weights (H, P, m).
    """
    form = p.volatility_form
    H = len(subsets)

    def run(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        # points: (H, G, p) -> chi2 (H, G), u (H, G, m)
        G = points.shape[1]
        per = max(1, _BATCH_ROWS // G)
        chis, us = [], []
        for s in range(0, H, per):
            sub = subsets[s:s + per]
            ps = p.stacked(sub, G)
            r = _profile_points(ps, points[s:s + per].reshape(-1, points.shape[2]),
                                settings.passes)
            chis.append(r["chi2"].reshape(len(sub), G))
            us.append(r["u"].reshape(len(sub), G, -1))
        return np.concatenate(chis), np.concatenate(us)

    grid = _grid(form)
    pts = np.broadcast_to(grid, (H,) + grid.shape).copy()
    chi, us = run(pts)
    all_pts, all_chi, all_u = [pts], [chi], [us]
    step = _grid_steps(form)
    for _level in range(settings.zoom_levels):
        P = np.concatenate(all_pts, axis=1)
        C = np.concatenate(all_chi, axis=1)
        if not np.isfinite(C).any():
            break
        j = np.argmin(np.where(np.isfinite(C), C, np.inf), axis=1)
        centres = P[np.arange(H), j]
        step = step / 2.0
        z = np.stack([_zoom(form, c, step, settings.zoom_points) for c in centres])
        chi, us = run(z)
        all_pts.append(z)
        all_chi.append(chi)
        all_u.append(us)
    return (np.concatenate(all_pts, axis=1), np.concatenate(all_chi, axis=1),
            np.concatenate(all_u, axis=1))


def _result(p: Problem, pts: np.ndarray, chi: np.ndarray, us: np.ndarray,
            settings: FitSettings) -> FitResult:
    """Build the FitResult of one hypothesis from its profile."""
    form = p.volatility_form
    K = p.Q.shape[0]
    has_late = p.late_name is not None
    n_params = (K - 1) + len(get_form(form).params) + (1 if has_late else 0)
    names = list(p.components)
    if not np.isfinite(chi).any():
        return _infeasible(p, pts[0], n_params, settings)
    j = int(np.argmin(chi))
    u = us[j]
    vol = pts[j]
    w = u[:K] / u[:K].sum()
    v = float(u[K]) if has_late else 0.0
    fwd0 = forward(p, w[None], vol[None], 0.0)
    lam = float(lam_from_v(p, np.array([v]), fwd0["M_s"])[0]) if has_late else 0.0
    fwd = forward(p, w[None], vol[None], lam)
    resid = _residual_table(p, fwd)
    iso_pred = _isotope_prediction(p, w, v)
    return FitResult(
        status=STATUS_OPTIMAL, components=tuple(names),
        weights=dict(zip(names, map(float, w), strict=True)),
        mass_fractions=dict(zip(names, map(float, fwd["x"][0]), strict=True)),
        volatility_form=form,
        volatility=dict(zip(get_form(form).params, map(float, vol), strict=True)),
        late_weight=v, late_accretion_fraction=lam,
        core_mass_fraction=float(fwd["cmf"][0]), k=float(fwd["k"][0]),
        chi2=float(chi[j]), n_elements=p.n_fit, n_params=n_params, residuals=resid,
        predicted=pd.Series(fwd["log10N"][0], index=list(p.elements), name="log10N"),
        isotopes=iso_pred, settings=settings,
    )


def fit_problem(p: Problem, settings: FitSettings | None = None) -> FitResult:
    """Fit one hypothesis (the problem's building blocks plus its late component).

    Parameters
    ----------
    p : Problem
        A compiled problem (see :func:`inversion.model.compile_problem`).
    settings : FitSettings, optional

    Returns
    -------
    FitResult
    """
    settings = settings or FitSettings()
    pts, chi, us = _profile_many(p, [p.components], settings)
    return _result(p, pts[0], chi[0], us[0], settings)


def _fit_group(args: tuple[Problem, list[tuple[str, ...]], FitSettings]) -> list[FitResult]:
    """Fit equal-size hypotheses together (one worker's share of a screen)."""
    p, subsets, settings = args
    pts, chi, us = _profile_many(p, subsets, settings)
    return [_result(p.subset(s), pts[i], chi[i], us[i], settings)
            for i, s in enumerate(subsets)]


def _isotope_prediction(p: Problem, w: np.ndarray, v: float) -> dict[str, float]:
    out = {}
    for iso in p.isotopes:
        num = (1 - v) * (w * iso["q_carrier"] * iso["eps"]).sum() + v * iso["q_late"] * iso[
            "eps_late"]
        den = (1 - v) * (w * iso["q_carrier"]).sum() + v * iso["q_late"]
        out[iso["name"]] = float(num / den)
    return out


def _residual_table(p: Problem, fwd: dict[str, np.ndarray], row: int = 0) -> pd.DataFrame:
    fitted = np.zeros(len(p.elements), dtype=bool)
    fitted[p.fit_index] = True
    z = (p.y_all - fwd["log10N"][row]) / p.sigma_all
    df = pd.DataFrame({
        "element": list(p.elements),
        "tc50": p.tc,
        "observed": p.y_all,
        "model": fwd["log10N"][row],
        "sigma": p.sigma_all,
        "z": z,
        "fitted": fitted,
    })
    df["flag"] = np.where(~np.isfinite(df["observed"]), "not observed",
                          np.where(np.abs(z) > 3, np.where(z > 0, "above model", "below model"),
                                   ""))
    return df


def _infeasible(p: Problem, vol: np.ndarray, n_params: int, settings: FitSettings) -> FitResult:
    reasons = []
    for iso in p.isotopes:
        lo, hi = iso["range"]
        win = p.isotope_window_sigma * iso["sigma"]
        if iso["value"] + win < lo or iso["value"] - win > hi:
            reasons.append(f"{iso['name']} = {iso['value']:g} +- {win:g} lies outside the range"
                           f" the building blocks span [{lo:g}, {hi:g}]")
    if not reasons and len(p.isotopes) > 1:
        # jointly unreachable: say which pairs fail
        for a, b in itertools.combinations(range(len(p.isotopes)), 2):
            sub = replace(p, isotopes=(p.isotopes[a], p.isotopes[b]))
            if not _profile_points(sub, vol[None], 1)["feasible"][0]:
                reasons.append(f"no mixture meets {p.isotopes[a]['name']} and "
                               f"{p.isotopes[b]['name']} together")
    if not reasons:
        base = replace(p, isotopes=())
        if not _profile_points(base, vol[None], 1)["feasible"][0]:
            reasons.append("iron budget: the mantle FeO needs more iron than the building "
                           "blocks hold")
        else:
            reasons.append("the isotope windows cannot be met together with the iron budget")
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
    """Fit a case with all its candidates together.

    Examples
    --------
    See ``case_studies/`` and the README for complete runs.
    """
    return fit_problem(compile_problem(case), settings)


@dataclass(frozen=True)
class Ranking:
    """Every hypothesis of a screen, best first (``table``), and their fits."""

    table: pd.DataFrame
    fits: tuple[FitResult, ...]

    def to_dataframe(self) -> pd.DataFrame:
        """The ranking table."""
        return self.table.copy()


def screen(case: Case, *, settings: FitSettings | None = None, workers: int = 1,
           progress: bool = False) -> Ranking:
    """Fit every subset of the candidates up to ``case.max_mixture_size`` and rank them.

    Every hypothesis uses the same elements (those all candidates hold), so chi2, AIC
    and BIC compare across hypotheses. Hypotheses of equal size are profiled together,
    stacked on the batch axis of the exact QP solver.

    Parameters
    ----------
    case : Case
    settings : FitSettings, optional
        Defaults to :data:`SCREEN_SETTINGS`.
    workers : int
        Processes to use (1 = in this process).
    progress : bool
        Show a progress bar on standard error.
    """
    settings = settings or SCREEN_SETTINGS
    p = compile_problem(case)
    names = list(p.components)
    jobs = []
    chunk = 12  # hypotheses per job: large enough to batch, small enough to spread
    for r in range(1, case.max_mixture_size + 1):
        subs = list(itertools.combinations(names, r))
        for s in range(0, len(subs), chunk):
            jobs.append((p, subs[s:s + chunk], settings))
    from tqdm.auto import tqdm

    total = sum(len(j[1]) for j in jobs)
    bar = tqdm(total=total, desc="hypotheses", disable=not progress, unit="fit")
    fits: list[FitResult] = []
    if workers > 1:
        with ProcessPoolExecutor(max_workers=workers) as ex:
            for res in ex.map(_fit_group, jobs):
                fits.extend(res)
                bar.update(len(res))
    else:
        for job in jobs:
            res = _fit_group(job)
            fits.extend(res)
            bar.update(len(res))
    bar.close()
    table = pd.concat([f.to_dataframe() for f in fits], ignore_index=True)
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
