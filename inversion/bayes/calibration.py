"""Simulation-based calibration: prior draws, simulated bodies, the SBC run (Talts et al. 2018)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

from ..exceptions import InputError
from ..model import Problem, forward
from ..options import check_option
from ..volatility import get_form
from .engines import _NutpieModel, sample, start_points
from .posterior import _with_y, posterior_arrays
from .priors import _partitioned, default_priors
from .pymc_model import STUDENT_NU, build_model
from .settings import ENGINES, SamplerSettings

__all__ = ["draw_prior", "simulate", "simulate_isotopes", "sbc"]

def draw_prior(p: Problem, priors: dict[str, dict[str, Any]], rng: np.random.Generator
               ) -> dict[str, Any]:
    """One draw of every parameter from its prior (numpy; for simulation studies)."""
    def one(spec: dict[str, Any]) -> float:
        d = spec["dist"]
        if d == "Uniform":
            return float(rng.uniform(spec["lower"], spec["upper"]))
        if d == "Normal":
            return float(rng.normal(spec["mu"], spec["sigma"]))
        if d == "HalfNormal":
            return float(abs(rng.normal(0.0, spec["sigma"])))
        if d == "LogNormal":
            return float(rng.lognormal(spec["mu"], spec["sigma"]))
        if d == "TruncatedNormal":
            while True:
                v = rng.normal(spec["mu"], spec["sigma"])
                if spec["lower"] <= v <= spec["upper"]:
                    return float(v)
        raise AssertionError(d)

    out: dict[str, Any] = {}
    K = len(p.components)
    if K > 1:
        a = priors["w"]["a"]
        out["w"] = rng.dirichlet(np.full(K, a) if np.isscalar(a) else np.asarray(a))
    for n in get_form(p.volatility_form).params:
        out[n] = one(priors[n])
    if p.late_name is not None:
        out["lam"] = one(priors["lam"])
    part = _partitioned(p)
    if part:
        out["log10D"] = np.array([one(priors[f"log10D_{p.elements[j]}"]) for j in part])
    out["tau"] = one(priors["tau"])
    return out


def simulate(p: Problem, truth: dict[str, Any], rng: np.random.Generator) -> np.ndarray:
    """Observations of the fitted elements drawn from the model's likelihood at ``truth``
    (Student-t, nu = 4, scale sqrt(sigma**2 + tau**2)), via the numpy forward model."""
    K = len(p.components)
    w = truth.get("w", np.ones(K))
    vol = [truth[n] for n in get_form(p.volatility_form).params]
    D = p.D.copy()
    part = _partitioned(p)
    if part:
        D[part] = 10.0 ** np.asarray(truth["log10D"])
    mu = forward(p, np.asarray(w)[None], np.asarray(vol)[None], truth.get("lam", 0.0),
                 D=D)["log10N"][0, p.fit_index]
    scale = np.sqrt(p.sigma ** 2 + truth["tau"] ** 2)
    return mu + scale * rng.standard_t(STUDENT_NU, size=mu.size)


def simulate_isotopes(p: Problem, truth: dict[str, Any], rng: np.random.Generator
                      ) -> np.ndarray:
    """Isotope anomalies drawn from the model's isotope likelihood at ``truth``:
    ``Normal(eps_planet, sigma_eff)`` with the carrier balance and the variance widened by
    the end-members' errors (:func:`inversion.kernel.isotope_variance`), at the truth's
    R-basis late weight."""
    from .. import kernel

    K = len(p.components)
    w = np.asarray(truth.get("w", np.ones(K)), float)
    vol = [truth[n] for n in get_form(p.volatility_form).params]
    D = p.D.copy()
    part = _partitioned(p)
    if part:
        D[part] = 10.0 ** np.asarray(truth["log10D"])
    v = float(forward(p, w[None], np.asarray(vol)[None], truth.get("lam", 0.0),
                      D=D)["v"][0])
    out = []
    for iso in p.isotopes:
        eps, var = kernel.isotope_variance(np, iso, w, v)
        out.append(float(eps) + math.sqrt(float(var)) * rng.standard_normal())
    return np.array(out)


def _with_isotopes(p: Problem, eps: np.ndarray) -> Problem:
    """The problem with its observed isotope anomalies replaced by ``eps``."""
    from dataclasses import replace as _replace

    return _replace(p, isotopes=tuple({**d, "value": float(e)}
                                      for d, e in zip(p.isotopes, eps, strict=True)))


def _flat_truth(truth: dict[str, Any], p: Problem) -> dict[str, float]:
    out = {}
    for k, v in truth.items():
        if np.ndim(v) == 0:
            out[k] = float(v)
        elif k == "w":
            out.update({f"w[{c}]": float(x) for c, x in zip(p.components, v, strict=True)})
        elif k == "log10D":
            out.update({f"log10D[{p.elements[j]}]": float(x)
                        for j, x in zip(_partitioned(p), v, strict=True)})
    return out


def sbc(p: Problem, n_replicates: int, *, draws: int = 200, tune: int = 200, chains: int = 2,
        seed: int = 0, thin_to: int = 99, priors: dict[str, dict[str, Any]] | None = None,
        progress: bool = False, engine: str = "nutpie", cores: int = 1,
        blocks: str = "fixed", fit_block_uncertainty: bool = True) -> pd.DataFrame:
    """Simulation-based calibration (Talts et al. 2018) of the sampler on problem ``p``.

    Each replicate draws parameters from the prior and simulates observations from the
    numpy forward model and the likelihood: the element data (``blocks="drawn"``: from
    building blocks whose ratios are drawn within their uncertainties,
    ``Q * 10**N(0, Q_sigma_dex)``, an errors-in-variables truth; ``"fixed"``: from
    ``p.Q`` itself) and, when the problem has isotope systems, the anomalies
    (:func:`simulate_isotopes`). It samples the posterior as :func:`sample` does (NUTS
    from the jittered convex optimum; the log density is compiled once and reused with
    new data; with ``fit_block_uncertainty=False`` the fitted model treats the blocks as
    exact: ``Q_sigma_dex`` dropped from the likelihood and the convex start), and records
    the rank of the truth among ``thin_to`` thinned posterior draws and whether the
    central 90% interval covers it.

    Returns
    -------
    DataFrame
        One row per replicate and scalar parameter: ``replicate``, ``parameter``,
        ``truth``, ``rank`` (0..thin_to), ``covered90``, plus ``divergences``.
    """
    import pymc as pm
    from tqdm import tqdm

    from ..fit import fit_problem
    from ..jaxmodel import jax_setup

    jax = jax_setup()
    check_option("sampler engine", engine, ENGINES)
    check_option("sbc blocks", blocks, ("fixed", "drawn"))
    if blocks == "drawn" and getattr(p, "Q_sigma_dex", None) is None:
        raise InputError("blocks='drawn' needs the blocks' uncertainties (Q_sigma_dex); "
                         "pass the problem as compiled", field="blocks", value=blocks)
    from dataclasses import replace as _replace

    q_sigma_sim = getattr(p, "Q_sigma_dex", None)
    if not fit_block_uncertainty:
        p = _replace(p, Q_sigma_dex=None)
    priors = priors or default_priors(p)
    rng = np.random.default_rng(seed)
    settings = SamplerSettings(draws=draws, tune=tune, chains=chains, seed=seed,
                               engine=engine, cores=cores)
    rows = []
    # nutpie and PyMC compile one model and swap its data; the default engine exports
    # each replicate's log density as `planetmix sample` does
    model = build_model(p, priors) if engine != "numpyro" else None
    runner = _NutpieModel.build(model) if engine == "nutpie" else None
    step = None
    if engine == "pymc":
        with model:
            step = pm.NUTS(target_accept=settings.target_accept)
    for r in tqdm(range(n_replicates), desc="SBC replicates", disable=not progress):
        truth = draw_prior(p, priors, rng)
        if blocks == "drawn":
            q_true = p.Q * 10.0 ** (rng.standard_normal(p.Q.shape) * q_sigma_sim)
            y = simulate(_replace(p, Q=q_true), truth, rng)
        else:
            y = simulate(p, truth, rng)
        # the isotopes are simulated too (else their observed values would pull every
        # replicate towards the case's own mixture)
        eps = simulate_isotopes(p, truth, rng) if p.isotopes else None
        p_rep = _with_y(p, y) if eps is None else _with_isotopes(_with_y(p, y), eps)
        fit = fit_problem(p_rep)
        if eps is not None and not fit.feasible:  # start from the chemistry alone
            fit = fit_problem(_replace(p_rep, isotopes=()))
        if engine == "numpyro":
            st = _replace(settings, seed=int(rng.integers(2**31 - 1)))
            idata = sample(p_rep, st, priors=priors, fit=fit, posterior_predictive=False,
                           log_likelihood=False).idata
            # every replicate compiles its own program (its data are constants of the
            # exported function); JAX keeps each in memory, and after ~70 replicates
            # LLVM could not map more code ("Cannot allocate memory", seen here)
            jax.clear_caches()
        elif runner is not None:
            idata, _, _ = runner.run(p, priors, fit, settings, cores=cores,
                                     seed=int(rng.integers(2**31 - 1)),
                                     jitter_seed=int(rng.integers(2**31 - 1)),
                                     progress=False, y=y, eps=eps)
        else:
            inits = start_points(p, priors, fit, chains, rng, settings.jitter)
            with model:
                pm.set_data({"y_data": y} if eps is None else {"y_data": y, "eps_data": eps})
                idata = pm.sample(draws=draws, tune=tune, chains=chains, cores=1, step=step,
                                  initvals=inits, random_seed=int(rng.integers(2**31 - 1)),
                                  progressbar=False, compute_convergence_checks=False)
        post = posterior_arrays(p, idata)
        div = int(idata.sample_stats["diverging"].values.sum())
        S = post["tau"].size
        idx = np.linspace(0, S - 1, thin_to).round().astype(int)
        flat = {"tau": post["tau"]}
        for j, n in enumerate(get_form(p.volatility_form).params):
            flat[n] = post["vol"][:, j]
        if p.late_name is not None:
            flat["lam"] = post["lam"]
        if len(p.components) > 1:
            for k, c in enumerate(p.components):
                flat[f"w[{c}]"] = post["w"][:, k]
        for j in _partitioned(p):
            flat[f"log10D[{p.elements[j]}]"] = np.log10(post["D"][:, j])
        # thin by position after a random shuffle of chains' interleaving
        order = rng.permutation(S)
        for name, t in _flat_truth(truth, p).items():
            v = flat[name]
            q = np.quantile(v, [0.05, 0.95])
            rows.append({"replicate": r, "parameter": name, "truth": t,
                         "rank": int(np.sum(v[order][idx] < t)),
                         "covered90": bool(q[0] <= t <= q[1]), "divergences": div})
    return pd.DataFrame(rows)
