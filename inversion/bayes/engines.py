"""Sampling: start points from the convex optimum, the NUTS engines (nutpie, NumPyro, PyMC),
the run record.
"""

from __future__ import annotations

import math
import os
import sys
import time
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..jaxmodel import condition_ranges
from ..model import Problem
from ..volatility import get_form
from .diagnostics import Diagnostics, diagnose
from .posterior import _add_observed, _with_y, add_log_likelihood, add_posterior_predictive
from .priors import _partitioned, _support_of, default_priors
from .pymc_model import build_model, parameter_names
from .settings import SamplerSettings

__all__ = ["SampleResult", "start_points", "sample"]


@dataclass(frozen=True)
class SampleResult:
    """A posterior: the InferenceData, its gate, and what produced it."""

    idata: Any
    diagnostics: Diagnostics
    settings: SamplerSettings
    seeds: dict[str, Any]
    priors: dict[str, dict[str, Any]]
    start: dict[str, Any]
    timing: dict[str, float]
    log_marginal_likelihood: float | None = None
    smc: dict[str, Any] = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        """Whether the run passed the diagnostics gate."""
        return self.diagnostics.passed


def _scale(spec: dict[str, Any]) -> float:
    if spec["dist"] in ("Uniform",):
        return spec["upper"] - spec["lower"]
    return float(spec.get("sigma", 1.0))


def _inside(value: float, spec: dict[str, Any]) -> float:
    lo, hi = _support_of(spec["dist"], spec)
    s = _scale(spec)
    lo_i = lo + 1e-3 * s if math.isfinite(lo) else -math.inf
    hi_i = hi - 1e-3 * s if math.isfinite(hi) else math.inf
    if spec["dist"] in ("HalfNormal", "LogNormal"):
        lo_i = 1e-3 * s if spec["dist"] == "HalfNormal" else 1e-6
    return float(np.clip(value, lo_i, hi_i))


def start_points(p: Problem, priors: dict[str, dict[str, Any]], fit: Any, chains: int,
                 rng: np.random.Generator, jitter: float) -> list[dict[str, Any]]:
    """Initial values per chain: the convex optimum, jittered, inside every prior.

    ``jitter`` is the relative perturbation (a fraction of each prior's scale; weights are
    mixed with a Dirichlet draw in that proportion). An infeasible or missing fit starts
    from the prior centres.
    """
    form = get_form(p.volatility_form)
    K = len(p.components)
    ok = fit is not None and fit.feasible
    part = _partitioned(p)
    tau0 = 0.03
    if ok:
        r = fit.residuals
        r = r[r["fitted"]]
        excess = float(np.mean((r["observed"] - r["model"]) ** 2 - r["sigma"] ** 2))
        tau0 = math.sqrt(max(excess, 0.0)) if excess > 0 else 0.02
    out = []
    for _ in range(chains):
        iv: dict[str, Any] = {}
        if K > 1:
            w0 = np.array([fit.weights[c] for c in p.components]) if ok else np.full(K, 1 / K)
            w = (1 - max(jitter, 1e-3)) * w0 + max(jitter, 1e-3) * rng.dirichlet(np.ones(K))
            iv["w"] = w / w.sum()
        for name in form.params:
            spec = priors[name]
            if ok:
                c = fit.volatility[name]
            else:
                lo, hi = _support_of(spec["dist"], spec)
                c = (lo + hi) / 2 if math.isfinite(hi) else spec.get("mu", spec.get("sigma"))
            iv[name] = _inside(c + jitter * _scale(spec) * rng.normal(), spec)
        if p.late_name is not None:
            spec = priors["lam"]
            lam0 = fit.late_accretion_fraction if ok else 0.5 * _support_of(spec["dist"],
                                                                             spec)[1]
            iv["lam"] = _inside(lam0 * (1 + jitter * rng.normal()), spec)
        if part:
            specs = [priors[f"log10D_{p.elements[j]}"] for j in part]
            vals = [_inside(s.get("mu", np.log10(p.D[j])) + jitter * _scale(s) * rng.normal(), s)
                    for j, s in zip(part, specs, strict=True)]
            if all(s["dist"] == "Normal" for s in specs):
                iv["log10D"] = np.array(vals)
            else:
                for j, v in zip(part, vals, strict=True):
                    iv[f"log10D_{p.elements[j]}"] = v
        for name in condition_ranges(p):  # sampled core-formation conditions
            if name not in priors:
                continue
            spec = priors[name]
            P0 = (p.core_conditions or {}).get(name)
            if P0 is None:
                lo, hi = _support_of(spec["dist"], spec)
                P0 = 0.5 * (lo + hi)
            iv[name] = _inside(float(P0) + jitter * _scale(spec) * rng.normal(), spec)
        iv["tau"] = _inside(tau0 * (1 + jitter * rng.normal()), priors["tau"])
        out.append(iv)
    return out


def sample(p: Problem, settings: SamplerSettings | None = None, *,
           priors: dict[str, dict[str, Any]] | None = None, fit: Any = None,
           progress: bool = False, y: np.ndarray | None = None,
           posterior_predictive: bool = True, log_likelihood: bool = True) -> SampleResult:
    """Sample the posterior of problem ``p`` with NUTS and apply the diagnostics gate.

    Parameters
    ----------
    p : Problem
    settings : SamplerSettings, optional
    priors : dict, optional
        Validated priors (:func:`check_priors`).
    fit : FitResult, optional
        The convex optimum to start from (computed with
        :func:`inversion.fit.fit_problem` when omitted).
    progress : bool
        Show the engine's progress display.
    y : ndarray, optional
        Synthetic observations replacing ``p.y`` (simulation studies).
    posterior_predictive, log_likelihood : bool
        Add these groups to the InferenceData.

    Returns
    -------
    SampleResult

    Notes
    -----
    One seed makes one ``numpy.random.Generator``; it yields the NUTS seed (split into
    per-chain streams by the engine), the posterior-predictive seed, the SMC seed and the
    start-point jitter seed, all recorded. ``timing`` separates the convex start, the
    compilation of the log density and the sampling itself.
    """
    with warnings.catch_warnings():
        # pytensor's C backend warns that it found no BLAS to link and XLA that it could
        # not reuse a donated buffer: neither path affects these results
        warnings.filterwarnings("ignore", message="PyTensor could not link to a BLAS")
        warnings.filterwarnings("ignore", message="Some donated buffers were not usable")
        return _sample(p, settings, priors=priors, fit=fit, progress=progress, y=y,
                       posterior_predictive=posterior_predictive,
                       log_likelihood=log_likelihood)


def _sample(p: Problem, settings: SamplerSettings | None = None, *,
           priors: dict[str, dict[str, Any]] | None = None, fit: Any = None,
           progress: bool = False, y: np.ndarray | None = None,
           posterior_predictive: bool = True, log_likelihood: bool = True) -> SampleResult:
    """:func:`sample` without the warning filters."""
    from ..fit import fit_problem

    settings = settings or SamplerSettings()
    priors = priors or default_priors(p)
    rng = np.random.default_rng(settings.seed)
    nuts_seed = int(rng.integers(0, 2**31 - 1))
    ppc_seed = int(rng.integers(0, 2**31 - 1))
    smc_seed = int(rng.integers(0, 2**31 - 1))
    t0 = time.perf_counter()
    if fit is None:
        obs_p = p if y is None else _with_y(p, y)
        fit = fit_problem(obs_p)
    jitter_seed = int(rng.integers(0, 2**31 - 1))
    t_fit = time.perf_counter() - t0
    cores = settings.cores or min(settings.chains, os.cpu_count() or 1)
    extra_timing: dict[str, float] = {}
    if settings.engine == "numpyro":
        from dataclasses import replace as dc_replace

        from ..jaxmodel import jax_setup

        if (settings.chain_method == "parallel"
                and jax_setup().local_device_count() < settings.chains):
            # JAX started with fewer CPU devices than chains (it was used before
            # jax_setup could ask for them): the chains run one after the other, which
            # gives other draws than parallel ones, so the result records what ran
            settings = dc_replace(settings, chain_method="sequential")
        # NumPyro's NUTS on the exported log density (inversion.bayes.warm): a run of a
        # model already in the cache loads it and never builds the PyMC model
        idata, inits, t_compile, t_nuts, names, extra_timing = _sample_exported(
            p, priors, fit, settings, y=y, seed=nuts_seed, jitter_seed=jitter_seed,
            progress=progress)
    elif settings.engine == "nutpie":
        model = build_model(p, priors, y=y)
        names = parameter_names(model)
        if progress:
            print("compiling the log density and its gradient (JAX; cached on disk for "
                  "the next run of the same model) ...", file=sys.stderr, flush=True)
        with warnings.catch_warnings():
            # pytensor's C backend warns that it found no BLAS to link; the JAX path
            # does not use that backend, so the warning would only mislead here
            warnings.filterwarnings("ignore", message="PyTensor could not link to a BLAS")
            runner = _NutpieModel.build(model)
        t_compile = runner.compile_seconds
        idata, inits, t_nuts = runner.run(p, priors, fit, settings, cores=cores,
                                          seed=nuts_seed, jitter_seed=jitter_seed,
                                          progress=progress)
    else:  # PyMC's own NUTS
        import pymc as pm

        model = build_model(p, priors, y=y)
        names = parameter_names(model)
        # PyMC runs parallel chains in forked processes, and a process forked after JAX
        # has started its threads deadlocks (seen: two idle children, no progress): the
        # model's physics is a JAX operation, so PyMC's chains run one after the other
        cores = 1
        inits = start_points(p, priors, fit, settings.chains,
                             np.random.default_rng(jitter_seed), settings.jitter)
        t1 = time.perf_counter()
        with model:
            idata = pm.sample(draws=settings.draws, tune=settings.tune,
                              chains=settings.chains, cores=cores, random_seed=nuts_seed,
                              initvals=inits, target_accept=settings.target_accept,
                              progressbar=progress, compute_convergence_checks=False,
                              init=settings.init)
        # PyMC compiles inside pm.sample; its own sampling_time excludes that
        t_nuts = float(idata.posterior.attrs.get("sampling_time", time.perf_counter() - t1))
        t_compile = time.perf_counter() - t1 - t_nuts
    if log_likelihood:
        add_log_likelihood(p, idata)
    if posterior_predictive:
        add_posterior_predictive(p, idata, np.random.default_rng(ppc_seed))
    diag = diagnose(idata, names)
    lml = None
    smc_info: dict[str, Any] = {}
    if settings.evidence:
        import pymc as pm

        t2 = time.perf_counter()
        with build_model(p, priors, y=y):
            smc = pm.sample_smc(draws=settings.smc_draws, chains=settings.smc_chains,
                                cores=1, random_seed=smc_seed, progressbar=progress,
                                compute_convergence_checks=False)
        # one row per SMC chain, one value per stage (NaN-padded): the final stage's
        # value is the chain's estimate
        raw = np.asarray(smc.sample_stats["log_marginal_likelihood"].values, dtype=float)
        raw = raw.reshape(settings.smc_chains, -1)
        per_chain = np.array([row[np.isfinite(row)][-1] if np.isfinite(row).any()
                              else np.nan for row in raw])
        top = np.nanmax(per_chain)
        lml = float(np.log(np.nanmean(np.exp(per_chain - top))) + top)
        smc_info = {"log_marginal_likelihood_per_chain": per_chain.tolist(),
                    "draws": settings.smc_draws, "chains": settings.smc_chains,
                    "seconds": time.perf_counter() - t2}
    seeds = {"seed": settings.seed, "nuts_seed": nuts_seed, "posterior_predictive_seed":
             ppc_seed, "smc_seed": smc_seed, "start_jitter_seed": jitter_seed,
             "generator": "numpy.random.default_rng(seed).integers(0, 2**31 - 1), in this "
             "order; the engine splits nuts_seed into one stream per chain"}
    start = {"fit_status": getattr(fit, "status", None), "initial_values": inits}
    timing = {"fit_seconds": t_fit, "compile_seconds": t_compile,
              "sampling_seconds": t_nuts, **extra_timing,
              "total_seconds": time.perf_counter() - t0}
    return SampleResult(idata=idata, diagnostics=diag, settings=settings, seeds=seeds,
                        priors=priors, start=start, timing=timing,
                        log_marginal_likelihood=lml, smc=smc_info)


def _sample_exported(p: Problem, priors: dict[str, dict[str, Any]], fit: Any,
                     settings: SamplerSettings, *, y: np.ndarray | None, seed: int,
                     jitter_seed: int, progress: bool
                     ) -> tuple[Any, list[dict[str, Any]], float, float, list[str],
                                dict[str, float]]:
    """NumPyro's NUTS on the exported log density of :mod:`inversion.bayes.warm`.

    Returns the InferenceData, the start points, the compile seconds (the exported log
    density loaded from the cache or built and written, and its value and gradient at
    the start points compiled, or loaded from XLA's cache, and evaluated), the sampling
    seconds (NumPyro's tracing and the compile or cache load of its program included),
    the free parameters' names and extra timing entries (``log_density_cached``: 1 when
    the exported log density came from the cache, 0 when it was built).

    Start points as PyMC's NumPyro path made them for this engine before: the convex
    optimum jittered by :func:`start_points`, mapped to the unconstrained space, plus a
    uniform jitter in [-1, 1] on every coordinate (PyMC's ``jitter``; here from a
    generator seeded with ``(jitter_seed, 1)``); a chain whose start has a non-finite
    log density or gradient (the core-iron support) draws its uniform jitter again, at
    most 10 times. The start points returned are the constrained values of the starts
    actually used.
    """
    from ..jaxmodel import jax_setup
    from .warm import load_or_build, sample_numpyro

    jax = jax_setup()
    t1 = time.perf_counter()
    em = load_or_build(p, priors, y)
    vg = jax.jit(lambda X: jax.lax.map(em.logp_grad.call, X))
    inits = start_points(p, priors, fit, settings.chains,
                         np.random.default_rng(jitter_seed), settings.jitter)
    x_opt = np.stack([em.to_unconstrained(iv) for iv in inits])
    u = np.random.default_rng([jitter_seed, 1])
    x0 = x_opt + u.uniform(-1.0, 1.0, x_opt.shape)
    for _ in range(10):
        v, grad = vg(x0)
        bad = ~(np.isfinite(np.asarray(v)) & np.all(np.isfinite(np.asarray(grad)), axis=1))
        if not bad.any():
            break
        x0[bad] = x_opt[bad] + u.uniform(-1.0, 1.0, (int(bad.sum()), x0.shape[1]))
    inits = [em.to_constrained(x) for x in x0]
    t_compile = time.perf_counter() - t1
    idata, t_nuts = sample_numpyro(em, x0, draws=settings.draws, tune=settings.tune,
                                   chains=settings.chains, seed=seed,
                                   target_accept=settings.target_accept,
                                   chain_method=settings.chain_method,
                                   dense_mass=settings.mass_matrix == "dense",
                                   progress=progress,
                                   warmup_tree_depth=settings.warmup_tree_depth)
    prog = float(idata.posterior.attrs["sampler_program_seconds"])
    extra = {"log_density_cached": float(em.origin == "loaded"),
             "log_density_seconds": em.seconds, "sampler_program_seconds": prog,
             "chains_seconds": t_nuts - prog}
    return idata, inits, t_compile, t_nuts, em.parameter_names, extra


def unconstrain_graph(model: Any, rvs: list[Any]) -> tuple[list[Any], Any]:
    """The pytensor graph from constrained values of the free variables ``rvs`` (one
    input each) to their flat unconstrained vector (PyMC's forward transforms, in that
    order): ``(inputs, output)``."""
    import pytensor.tensor as pt

    ins, flat = [], []
    for rv in rvs:
        x = rv.type()
        tr = model.rvs_to_transforms.get(rv)
        y = tr.forward(x, *rv.owner.inputs) if tr is not None else x
        ins.append(x)
        flat.append(pt.as_tensor_variable(y).ravel())
    return ins, pt.concatenate(flat)


def _unconstrain_function(model: Any, order: list[str] | None = None):
    """Compiled map from constrained values of the free parameters (a dict) to the flat
    unconstrained vector, in the order of the value variables named in ``order`` (the
    sampler's order; default ``model.free_RVs``)."""
    import pytensor

    rvs = list(model.free_RVs)
    if order is not None:
        by_value = {model.rvs_to_values[rv].name: rv for rv in rvs}
        rvs = [by_value[n] for n in order]
    names = [rv.name for rv in rvs]
    ins, out = unconstrain_graph(model, rvs)
    fn = pytensor.function(ins, out, mode="FAST_COMPILE", on_unused_input="ignore")
    return lambda values: np.asarray(fn(*(np.asarray(values[n], float) for n in names)))


@dataclass
class _NutpieModel:
    """A model compiled once for nutpie, sampled many times (with new data for SBC)."""

    compiled: Any
    unconstrain: Any
    compile_seconds: float

    @classmethod
    def build(cls, model: Any) -> _NutpieModel:
        """Compile ``model``'s log density and gradient with JAX (the physics is the
        JAX operation of :mod:`inversion.jaxmodel`; the priors and transforms are PyMC's
        graph, translated to JAX by pytensor)."""
        import nutpie

        from ..jaxmodel import jax_setup

        jax_setup()
        t = time.perf_counter()
        keep = [rv.name for rv in model.free_RVs] + [d.name for d in model.deterministics]
        # not frozen: the observations stay data, so that simulation studies swap them
        # without compiling again (``with_data``)
        compiled = nutpie.compile_pymc_model(model, backend="jax", gradient_backend="jax",
                                             var_names=keep, freeze_model=False)
        # the JAX model orders the unconstrained vector by its own rule: take it from it
        values = {model.rvs_to_values[rv].name for rv in model.free_RVs}
        order = [v.name for v in compiled._variables if v.name in values]
        return cls(compiled, _unconstrain_function(model, order), time.perf_counter() - t)

    def run(self, p: Problem, priors: dict[str, dict[str, Any]], fit: Any,
            settings: SamplerSettings, *, cores: int, seed: int, jitter_seed: int,
            progress: bool, y: np.ndarray | None = None, eps: np.ndarray | None = None
            ) -> tuple[Any, list[dict[str, Any]], float]:
        """NUTS by nutpie, on the model's own observations or on ``y`` (SBC).

        Returns the InferenceData (free parameters in the constrained space, the
        deterministics, the observed data), the start points (in the order of the chain
        seeds) and the sampling seconds. ``eps`` replaces the observed isotope anomalies
        (simulation studies), as ``y`` replaces the element data.

        Each chain starts from the convex optimum jittered by a generator seeded with
        ``(jitter_seed, chain seed)``, so that a run is reproducible from its seed
        whatever order nutpie's threads start in.
        """
        import threading
        from dataclasses import replace as dc_replace

        import nutpie

        starts: dict[int, dict[str, Any]] = {}
        lock = threading.Lock()

        def initial_point(chain_seed: int) -> np.ndarray:
            g = np.random.default_rng([jitter_seed, int(chain_seed) % 2**63])
            iv = start_points(p, priors, fit, 1, g, settings.jitter)[0]
            # the compiled map is not safe to call from two chain threads at once
            with lock:
                starts[int(chain_seed)] = iv
                return self.unconstrain(iv)

        data = {} if y is None else {"y_data": np.asarray(y, float)}
        if eps is not None:
            data["eps_data"] = np.asarray(eps, float)
        compiled = self.compiled.with_data(**data) if data else self.compiled
        # nutpie's JAX models (PyFuncModel) and numba models name the start hook apart
        hook = ("_make_initial_points" if hasattr(compiled, "_make_initial_points")
                else "initial_point_func")
        compiled = dc_replace(compiled, **{hook: initial_point})
        t = time.perf_counter()
        mass = {"draw-variance": {"use_grad_based_mass_matrix": False},
                "gradient-variance": {},
                "low-rank": {"low_rank_modified_mass_matrix": True}}[settings.mass_matrix]
        idata = nutpie.sample(compiled, draws=settings.draws, tune=settings.tune,
                              chains=settings.chains, cores=cores, seed=seed,
                              target_accept=settings.target_accept, save_warmup=False,
                              progress_bar=progress, **mass)
        t_nuts = time.perf_counter() - t
        shared = getattr(compiled, "_shared_data", None)
        shared = compiled.shared_data if shared is None else shared
        _add_observed(idata, p, np.asarray(shared["y_data"]),
                      None if eps is None else np.asarray(eps, float))
        return idata, [starts[k] for k in sorted(starts)], t_nuts
