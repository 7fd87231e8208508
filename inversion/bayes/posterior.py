"""Posterior products: log likelihood and posterior predictive groups, the planet's draws,
outliers, summaries.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..jaxmodel import condition_ranges, conditions_D
from ..model import Problem, forward
from ..volatility import get_form
from .priors import _partitioned
from .pymc_model import OBS_ELEMENTS, STUDENT_NU

__all__ = ["add_log_likelihood", "add_posterior_predictive", "posterior_arrays",
           "posterior_planet", "planet_draws", "outliers", "summary_table", "main_parameters"]

def _add_observed(idata: Any, p: Problem, y: np.ndarray,
                  eps: np.ndarray | None = None) -> None:
    """The ``observed_data`` group (elements and isotopes), as PyMC writes it."""
    import xarray as xr

    data = {OBS_ELEMENTS: (("elements",), np.asarray(y, float))}
    coords = {"elements": list(p.fit_elements)}
    if p.isotopes:
        eps = np.array([d["value"] for d in p.isotopes]) if eps is None else eps
        data["eps_obs"] = (("isotopes",), np.asarray(eps, float))
        coords["isotopes"] = [d["name"] for d in p.isotopes]
    idata.add_groups({"observed_data": xr.Dataset(data, coords=coords)})


def _obs_scale(p: Problem, post: Any) -> np.ndarray:
    """Likelihood scale of the fitted elements per draw, as in :func:`build_model`:
    sqrt(sigma**2 + tau**2 + sigma_model**2), the last term where the model has it."""
    var = p.sigma ** 2 + post["tau"].values[..., None] ** 2
    if "sigma_model" in post:
        var = var + post["sigma_model"].values ** 2
    return np.sqrt(var)


def add_log_likelihood(p: Problem, idata: Any) -> None:
    """Add the pointwise log-likelihood group (elements ``y_obs``; isotopes ``eps_obs``).

    Computed in numpy from the posterior's deterministics ``mu`` and ``eps_pred`` with
    the model's densities (Student-t, nu = 4; Normal), which avoids compiling another
    pytensor function.
    """
    import xarray as xr
    from scipy import stats

    post = idata.posterior
    y = idata.observed_data[OBS_ELEMENTS].values
    scale = _obs_scale(p, post)
    ll = stats.t.logpdf(y, STUDENT_NU, loc=post["mu"].values, scale=scale)
    data = {OBS_ELEMENTS: (("chain", "draw", "elements"), ll)}
    coords = {"chain": post["chain"].values, "draw": post["draw"].values,
              "elements": post["elements"].values}
    if p.isotopes:
        vals = np.array([d["value"] for d in p.isotopes])
        sig = (post["eps_sigma"].values if "eps_sigma" in post
               else np.array([d["sigma"] for d in p.isotopes]))
        data["eps_obs"] = (("chain", "draw", "isotopes"),
                           stats.norm.logpdf(vals, loc=post["eps_pred"].values, scale=sig))
        coords["isotopes"] = post["isotopes"].values
    idata.add_groups({"log_likelihood": xr.Dataset(data, coords=coords)})


def add_posterior_predictive(p: Problem, idata: Any, rng: np.random.Generator) -> None:
    """Add replicated observations of the fitted elements (``y_obs``) per draw, drawn in
    numpy from the likelihood at the posterior's ``mu`` and ``tau``."""
    import xarray as xr

    post = idata.posterior
    mu = post["mu"].values
    scale = _obs_scale(p, post)
    rep = mu + scale * rng.standard_t(STUDENT_NU, size=mu.shape)
    idata.add_groups({"posterior_predictive": xr.Dataset(
        {OBS_ELEMENTS: (("chain", "draw", "elements"), rep)},
        coords={"chain": post["chain"].values, "draw": post["draw"].values,
                "elements": post["elements"].values})})


def _with_y(p: Problem, y: np.ndarray) -> Problem:
    from dataclasses import replace

    y_all = p.y_all.copy()
    y_all[p.fit_index] = y
    return replace(p, y=np.asarray(y, float), y_all=y_all)


def posterior_arrays(p: Problem, idata: Any) -> dict[str, np.ndarray]:
    """Posterior draws flattened over (chain, draw): ``w`` (S, K), ``vol`` (S, p),
    ``lam`` (S,), ``D`` (S, n), ``tau`` (S,), ``chain`` and ``draw`` (S,)."""
    post = idata.posterior
    nc, nd = post.sizes["chain"], post.sizes["draw"]
    S = nc * nd
    K = len(p.components)
    w = post["w"].values.reshape(S, K) if "w" in post else np.ones((S, 1))
    form = get_form(p.volatility_form)
    vol = np.stack([post[n].values.reshape(S) for n in form.params], axis=1)
    lam = post["lam"].values.reshape(S) if "lam" in post else np.zeros(S)
    D = np.broadcast_to(p.D, (S, p.D.size)).copy()
    sampled = [k for k in condition_ranges(p) if k in post]
    if sampled:
        _, D_of = conditions_D(p)
        cv = {k: post[k].values.reshape(S) for k in sampled}
        P_fix = float(p.core_conditions["pressure_GPa"])
        D = np.stack([D_of(float(cv["pressure_GPa"][i]) if "pressure_GPa" in cv else P_fix,
                           float(cv["temperature_K"][i]) if "temperature_K" in cv else None,
                           float(cv["dIW"][i]) if "dIW" in cv else None)
                      for i in range(S)])
    part = _partitioned(p)
    if part:
        D[:, part] = 10.0 ** post["log10D"].values.reshape(S, len(part))
    chain, draw = np.meshgrid(post["chain"].values, post["draw"].values, indexing="ij")
    out = {"w": w, "vol": vol, "lam": lam, "D": D, "tau": post["tau"].values.reshape(S),
           "chain": chain.ravel(), "draw": draw.ravel()}
    if "dIW" in sampled:
        out["dIW"] = cv["dIW"]
    return out


def _forward_draws(p: Problem, d: dict[str, np.ndarray]) -> dict[str, Any]:
    """The numpy forward model at the posterior draws; with a sampled dIW (which sets
    the iron split) each draw at its own dIW (per-row dIW of the forward model)."""
    if "dIW" not in d:
        return forward(p, d["w"], d["vol"], d["lam"], D=d["D"])
    if p.dIW is None:
        from dataclasses import replace

        p = replace(p, dIW=float(np.median(d["dIW"])))
    return forward(p, d["w"], d["vol"], d["lam"], D=d["D"], dIW=d["dIW"])


def posterior_planet(p: Problem, idata: Any, *, planet_mass_kg: float | None = None
                     ) -> tuple[pd.DataFrame, Any]:
    """Whole-planet quantities per posterior draw (numpy forward model, vectorised).

    Returns
    -------
    table : DataFrame
        ``planet_draws.parquet``: ``chain``, ``draw``, ``mantle_<oxide>_wt`` (wt%),
        ``core_<element>_wt`` (wt%, elements present in the core),
        ``core_mass_fraction``, ``late_accretion_fraction`` (of the mantle),
        ``late_accretion_planet_fraction``, the molar ratios of
        :data:`inversion.planet.RATIO_NAMES`, and the mantle's radiogenic heat
        production ``heat_W_per_kg`` (today), ``heat_W_per_kg_<t>Gyr`` (history) and
        ``heat_total_W`` (with a planet mass).
    handoff : inversion.handoff.PlanetDraws
        The same draws in the interior-model hand-off form (``planet.json``).
    """
    from ..handoff import planet_draws as handoff_draws
    from ..planet import assemble

    d = posterior_arrays(p, idata)
    fwd = _forward_draws(p, d)
    pl = assemble(p, fwd)
    hand = handoff_draws(p, pl, planet_mass_kg=planet_mass_kg)
    cols: dict[str, np.ndarray] = {"chain": d["chain"], "draw": d["draw"]}
    for j, ox in enumerate(pl["oxides"]):
        cols[f"mantle_{ox}_wt"] = pl["mantle_oxides_wt"][:, j]
    core = pl["core_wt"]
    for j, e in enumerate(pl["elements"]):
        if np.any(core[:, j] > 0):
            cols[f"core_{e}_wt"] = core[:, j]
    cols["core_mass_fraction"] = pl["cmf"]
    cols["late_accretion_fraction"] = d["lam"]
    cols["late_accretion_planet_fraction"] = d["lam"] * (1.0 - pl["cmf"])
    for name, val in pl["ratios"].items():
        cols[name] = np.asarray(val)
    cols.update({k: v for k, v in hand.columns(bulk=False).items() if k.startswith("heat_")})
    return pd.DataFrame(cols), hand


def planet_draws(p: Problem, idata: Any, *, planet_mass_kg: float | None = None
                 ) -> pd.DataFrame:
    """The table of :func:`posterior_planet` (one row per posterior draw)."""
    return posterior_planet(p, idata, planet_mass_kg=planet_mass_kg)[0]


def outliers(p: Problem, idata: Any, *, threshold: float = 3.0) -> pd.DataFrame:
    """Observed elements whose posterior-predictive residual exceeds ``threshold`` scales.

    For every observed element (fitted or not), the residual ``y - mu`` and the scale
    ``sqrt(sigma**2 + tau**2 + sigma_model**2)`` (``sigma_model`` the end-member term of
    the blocks' uncertainties at the draw's weights, :func:`inversion.kernel.
    end_member_variance`) are computed per draw; ``z`` is the posterior median of their
    ratio. ``tail_probability`` is the posterior-predictive p-value: the probability,
    averaged over the posterior, of a replicate at least as far from the model as the
    observation (two-sided, Student-t with nu = 4, the likelihood's own law). ``class``
    is the element's geochemical family (lithophile, or chalcophile/siderophile).
    """
    from scipy import stats

    from .. import kernel

    d = posterior_arrays(p, idata)
    fwd = _forward_draws(p, d)
    obs = np.isfinite(p.y_all)
    obs[p.ref_index] = False
    mu = fwd["log10N"][:, obs]
    y = p.y_all[obs]
    var = p.sigma_all[obs][None, :] ** 2 + d["tau"][:, None] ** 2
    if p.Q_sigma_dex is not None:
        var = var + np.nan_to_num(kernel.end_member_variance(
            np, np.asarray(p.Q, float)[:, obs], np.asarray(p.Q_sigma_dex, float)[:, obs],
            d["w"]))
    scale = np.sqrt(var)
    z_draws = (y[None, :] - mu) / scale
    z = np.median(z_draws, axis=0)
    tail = np.mean(2 * stats.t.sf(np.abs(z_draws), STUDENT_NU), axis=0)
    fitted = np.zeros(len(p.elements), dtype=bool)
    fitted[p.fit_index] = True
    els = np.array(p.elements)[obs]
    metal = (np.zeros(len(p.elements), bool) if p.metal_class is None
             else np.asarray(p.metal_class, bool))
    df = pd.DataFrame({
        "element": els, "tc50_K": p.tc[obs], "fitted": fitted[obs],
        "class": np.where(metal[obs], "chalcophile/siderophile", "lithophile"),
        "observed_log10N": y, "predicted_log10N": np.median(mu, axis=0),
        "residual_dex": y - np.median(mu, axis=0), "scale_dex": np.median(scale, axis=0),
        "z": z, "tail_probability": tail,
        "direction": np.where(z > 0, "above model", "below model"),
    })
    return df[np.abs(df["z"]) > threshold].sort_values("z", key=np.abs, ascending=False
                                                        ).reset_index(drop=True)


def summary_table(idata: Any, var_names: list[str]) -> pd.DataFrame:
    """Every parameter (one row per coordinate): mean, sd, 5%, 50%, 95%, r_hat, ess_bulk."""
    import arviz as az

    post = idata.posterior
    rh = az.rhat(idata, var_names=var_names)
    es = az.ess(idata, var_names=var_names, method="bulk")
    rows = []
    for name in var_names:
        da = post[name]
        extra = [d for d in da.dims if d not in ("chain", "draw")]
        vals = da.values.reshape(da.sizes["chain"] * da.sizes["draw"], -1)
        labels = [name] if not extra else [f"{name}[{c}]" for c in da[extra[0]].values]
        r = np.atleast_1d(rh[name].values).ravel()
        e = np.atleast_1d(es[name].values).ravel()
        for j, lab in enumerate(labels):
            v = vals[:, j]
            q = np.quantile(v, [0.05, 0.5, 0.95])
            rows.append({"parameter": lab, "mean": v.mean(), "sd": v.std(ddof=1),
                         "q05": q[0], "q50": q[1], "q95": q[2], "r_hat": r[j],
                         "ess_bulk": e[j]})
    return pd.DataFrame(rows)


def _interval(v: np.ndarray) -> dict[str, float]:
    q = np.quantile(v, [0.05, 0.5, 0.95])
    return {"median": float(q[1]), "q05": float(q[0]), "q95": float(q[2])}


def main_parameters(p: Problem, idata: Any, planet: pd.DataFrame | None = None
                    ) -> dict[str, Any]:
    """Posterior medians and 90% intervals of the main parameters (for ``sample.json``)."""
    d = posterior_arrays(p, idata)
    fwd_x = d["w"] / p.c_comp_R[None, :]
    fwd_x = fwd_x / fwd_x.sum(axis=1, keepdims=True)
    out: dict[str, Any] = {
        "weights": {c: _interval(d["w"][:, k]) for k, c in enumerate(p.components)},
        "mass_fractions": {c: _interval(fwd_x[:, k]) for k, c in enumerate(p.components)},
        "volatility": {"form": p.volatility_form, **{
            n: _interval(d["vol"][:, j])
            for j, n in enumerate(get_form(p.volatility_form).params)}},
        "tau_dex": _interval(d["tau"]),
    }
    if p.late_name is not None:
        out["late_accretion_fraction"] = _interval(d["lam"])
    if planet is not None:
        out["core_mass_fraction"] = _interval(planet["core_mass_fraction"].to_numpy())
        if p.late_name is not None:
            out["late_accretion_planet_fraction"] = _interval(
                planet["late_accretion_planet_fraction"].to_numpy())
    else:
        out["core_mass_fraction"] = _interval(idata.posterior["cmf"].values.ravel())
    return out
