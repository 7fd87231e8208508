"""Bayesian inversion with PyMC (docs/model.md sections 8-9): priors, model, sampling, gate.

The physics is the single forward model of :mod:`inversion.kernel`, run on JAX
(:mod:`inversion.jaxmodel`) as one operation of the PyMC model: R-basis weights of the
building blocks on the simplex, the chosen volatility form, core formation (the fixed
point of the core-to-mantle mass ratio, with its implicit-function gradient), late
accretion, isotope mass balance; PyMC holds the priors and a Student-t likelihood with a
model-scatter term on the fitted elements.
:func:`sample` runs NUTS from the convex optimum (nutpie on the JAX-compiled log density
by default, PyMC's own NUTS on request), applies the diagnostics gate and returns a
:class:`SampleResult`; the posterior draws of the whole planet come from the
numpy forward model, vectorised over draws (:func:`planet_draws`).

Notes
-----
Likelihood of the fitted elements (observed ``y_i``, 1-sigma ``sigma_i`` dex)::

    y_i ~ StudentT(nu = 4, mu_i(theta), sqrt(sigma_i**2 + tau**2))

with ``tau`` a model-scatter term (HalfNormal(0.05) dex); where the problem carries the
blocks' uncertainties (``Problem.Q_sigma_dex``) the scale also holds the end-member term
``sigma_model_i`` of :func:`end_member_sigma_dex` (added in quadrature). Each isotope anomaly of the
case adds ``eps_obs ~ Normal(eps_planet(w, v), sigma_eff(w, v))`` with ``eps_planet`` the
carrier-weighted mass balance of the building blocks and the late component, and
``sigma_eff**2 = sigma_obs**2 + sum_k phi_k**2 (s_k**2 + r_k**2 (eps_k - eps_planet)**2)``
(``phi_k`` the share of the carrier from column k, ``s_k`` the end-member's 1-sigma,
``r_k`` the relative 1-sigma of its carrier ratio; :func:`inversion.isotopes.effective_sigma`).

References
----------
Vehtari A., Gelman A., Simpson D., Carpenter B., Buerkner P.-C. (2021) Rank-normalization,
folding, and localization: an improved R-hat for assessing convergence of MCMC. Bayesian
Analysis 16, 667 (the gate thresholds: R-hat <= 1.01, bulk ESS >= 400).
Talts S., Betancourt M., Simpson D., Vehtari A., Gelman A. (2018) Validating Bayesian
inference algorithms with simulation-based calibration. arXiv:1804.06788.
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
import pandas as pd

from . import kernel
from .exceptions import InputError
from .model import Problem, forward
from .options import check_option
from .volatility import get_form

__all__ = ["SamplerSettings", "Diagnostics", "SampleResult", "PRIOR_DISTRIBUTIONS",
           "GATE_RHAT_MAX", "GATE_ESS_BULK_MIN", "GATE_DIVERGENCES_MAX",
           "STUDENT_NU", "default_priors", "check_priors", "check_sampler_settings",
           "build_model", "end_member_sigma_dex",
           "sample", "diagnose",
           "summary_table", "planet_draws", "posterior_planet", "outliers", "posterior_arrays",
           "main_parameters", "compare_runs"]

#: Gate thresholds (Vehtari et al. 2021).
GATE_RHAT_MAX = 1.01
GATE_ESS_BULK_MIN = 400.0
GATE_DIVERGENCES_MAX = 0
#: Degrees of freedom of the Student-t likelihood (docs/model.md section 8).
STUDENT_NU = 4.0
#: Observed variable names in the model.
OBS_ELEMENTS = "y_obs"

# --------------------------------------------------------------------------- priors
#: Declared prior distributions and their parameters (one check, one message template).
PRIOR_DISTRIBUTIONS: dict[str, tuple[str, ...]] = {
    "Uniform": ("lower", "upper"),
    "Normal": ("mu", "sigma"),
    "HalfNormal": ("sigma",),
    "TruncatedNormal": ("mu", "sigma", "lower", "upper"),
    "LogNormal": ("mu", "sigma"),
    "Dirichlet": ("a",),
}


def _support_of(dist: str, pars: dict[str, Any]) -> tuple[float, float]:
    if dist == "Uniform" or dist == "TruncatedNormal":
        return float(pars["lower"]), float(pars["upper"])
    if dist in ("HalfNormal", "LogNormal"):
        return 0.0, math.inf
    return -math.inf, math.inf


def default_priors(p: Problem) -> dict[str, dict[str, Any]]:
    """The default prior of every parameter of the model for problem ``p``.

    Returns
    -------
    dict
        parameter name -> ``{"dist": ..., <parameters>}``; also ``_support`` entries
        (the interval each parameter's prior must lie in) are kept separately, see
        :func:`check_priors`.
    """
    pri: dict[str, dict[str, Any]] = {}
    K = len(p.components)
    if K > 1:
        pri["w"] = {"dist": "Dirichlet", "a": 1.0}
    form = get_form(p.volatility_form)
    if form.name in ("kinked", "kinked-floor"):
        pri["T0"] = {"dist": "Uniform", "lower": 900.0, "upper": 1700.0}
        # 0.004 dex/K: 2-4 dex per 1000 K lies well inside the half-normal's bulk
        pri["slope"] = {"dist": "HalfNormal", "sigma": 0.004}
        if form.name == "kinked-floor":
            pri["log10_floor"] = {"dist": "Uniform", "lower": -6.0, "upper": 0.0}
    else:
        for name, lo, hi in zip(form.params, form.lower, form.upper, strict=True):
            pri[name] = {"dist": "Uniform", "lower": float(lo), "upper": float(hi)}
    if p.late_name is not None:
        pri["lam"] = {"dist": "Uniform", "lower": 0.0, "upper": float(p.late_max_fraction)}
    for j in _partitioned(p):
        pri[f"log10D_{p.elements[j]}"] = {"dist": "Normal", "mu": float(np.log10(p.D[j])),
                                          "sigma": float(p.D_spread[j])}
    pri["tau"] = {"dist": "HalfNormal", "sigma": 0.05}
    return pri


def _supports(p: Problem) -> dict[str, tuple[float, float]]:
    sup: dict[str, tuple[float, float]] = {"tau": (0.0, math.inf)}
    form = get_form(p.volatility_form)
    for name, lo, hi in zip(form.params, form.lower, form.upper, strict=True):
        sup[name] = (float(lo), float(hi))
    if form.name in ("kinked", "kinked-floor"):
        sup["slope"] = (0.0, math.inf)
    if form.name == "logistic":
        sup["width"] = (1e-9, math.inf)
    if form.name == "power":
        sup["a"] = (0.0, math.inf)
        sup["b"] = (-math.inf, 0.0)
    if p.late_name is not None:
        sup["lam"] = (0.0, 0.999)
    for j in _partitioned(p):
        sup[f"log10D_{p.elements[j]}"] = (-math.inf, math.inf)
    return sup


def _partitioned(p: Problem) -> list[int]:
    """Indices of elements whose effective log10 D is a parameter (spread > 0, D > 0)."""
    return [j for j in range(len(p.elements))
            if p.D_spread[j] > 0 and p.D[j] > 0 and j != p.fe_index]


def check_priors(p: Problem, priors: dict[str, Any] | None, *, file: str | None = None
                 ) -> dict[str, dict[str, Any]]:
    """Validate the case's ``[priors]`` table and merge it over the defaults.

    Parameters
    ----------
    p : Problem
    priors : dict
        parameter name -> ``{dist = "Uniform", lower = ..., upper = ...}`` (TOML table).
    file : str, optional
        The case file, named in errors.

    Returns
    -------
    dict
        The full prior set (defaults with the overrides applied).

    Raises
    ------
    InputError
        Unknown parameter (lists the valid ones), unknown distribution, missing or
        extra distribution parameters, non-numbers, or a prior whose support leaves the
        parameter's physical range.
    """
    out = default_priors(p)
    sup = _supports(p)
    for name, spec in (priors or {}).items():
        fld = f"priors.{name}"
        if name not in out:
            raise InputError(f"unknown prior parameter; this case's parameters are "
                             f"{sorted(out)}", file=file, field=fld, value=name)
        if not isinstance(spec, dict) or "dist" not in spec:
            raise InputError('give a table such as {dist = "Uniform", lower = 0, upper = 1}',
                             file=file, field=fld, value=spec)
        dist = spec["dist"]
        if dist not in PRIOR_DISTRIBUTIONS:
            raise InputError(f"unknown distribution; choose one of "
                             f"{sorted(PRIOR_DISTRIBUTIONS)}", file=file, field=fld + ".dist",
                             value=dist)
        if (dist == "Dirichlet") != (name == "w"):
            raise InputError("the weights take a Dirichlet prior and only they do", file=file,
                             field=fld + ".dist", value=dist)
        need = PRIOR_DISTRIBUTIONS[dist]
        got = {k: v for k, v in spec.items() if k != "dist"}
        if set(got) != set(need):
            raise InputError(f"{dist} takes exactly the parameters {list(need)}", file=file,
                             field=fld, value=sorted(got))
        pars: dict[str, Any] = {}
        for k, v in got.items():
            if name == "w" and isinstance(v, list):
                if len(v) != len(p.components) or not all(
                        isinstance(x, int | float) and not isinstance(x, bool) and x > 0
                        for x in v):
                    raise InputError(f"give one positive number per building block "
                                     f"({len(p.components)})", file=file, field=f"{fld}.{k}",
                                     value=v)
                pars[k] = [float(x) for x in v]
                continue
            if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
                raise InputError("must be a finite number", file=file, field=f"{fld}.{k}",
                                 value=v)
            pars[k] = float(v)
        for k in ("sigma", "a"):
            if k in pars and not isinstance(pars[k], list) and pars[k] <= 0:
                raise InputError("must be positive", file=file, field=f"{fld}.{k}",
                                 value=pars[k])
        if "lower" in pars and not pars["lower"] < pars["upper"]:
            raise InputError("lower must be below upper", file=file, field=fld,
                             value=[pars["lower"], pars["upper"]])
        if name in sup:
            lo, hi = _support_of(dist, pars)
            slo, shi = sup[name]
            if lo < slo or hi > shi:
                raise InputError(f"{dist} reaches outside the parameter's range "
                                 f"[{slo:g}, {shi:g}]; choose a distribution inside it",
                                 file=file, field=fld, value=[lo, hi])
        out[name] = {"dist": dist, **pars}
    return out


# --------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class SamplerSettings:
    """Settings of a NUTS run (recorded in every result).

    Defaults: 4 chains of 1000 tuning and 1000 kept draws at target acceptance 0.9,
    which pass the gate on the library's cases (bulk ESS >= 400 needs about 100
    effective draws per chain). ``mass_matrix`` (nutpie only) is one of
    :data:`MASS_MATRICES`. ``engine`` chooses the NUTS implementation:
    ``"nutpie"`` (default; the log density and its gradient compiled with JAX and
    sampled by nutpie's NUTS, chains in threads) or ``"pymc"`` (PyMC's own NUTS in
    Python, chains in processes; slower per draw, kept for cross-checks).
    """

    draws: int = 1000
    tune: int = 1000
    chains: int = 4
    seed: int = 0
    target_accept: float = 0.9
    cores: int | None = None
    jitter: float = 0.02
    init: str = "adapt_diag"
    evidence: bool = False
    smc_draws: int = 1000
    smc_chains: int = 2
    engine: str = "nutpie"
    mass_matrix: str = "draw-variance"


#: NUTS implementations (``[sampler] engine``, ``--engine``).
ENGINES = ("nutpie", "pymc")
#: Mass-matrix adaptation of the nutpie engine (``[sampler] mass_matrix``):
#: ``draw-variance`` (diagonal, from the variance of the tuning draws, as Stan and PyMC
#: adapt it; the default: on the four-block demo planet it gave 1.7-2.6x the minimum
#: bulk ESS of the gradient-based estimate at 1.6x the time), ``gradient-variance``
#: (nutpie's own diagonal estimate from draws and gradients), ``low-rank`` (diagonal plus
#: a low-rank correction for correlated parameters).
MASS_MATRICES = ("draw-variance", "gradient-variance", "low-rank")
#: PyMC initialisations of the mass matrix (``[sampler] init``; ``engine = "pymc"`` only).
PYMC_INITS = ("adapt_diag", "jitter+adapt_diag", "adapt_full", "jitter+adapt_full")
_SAMPLER_KEYS = ("draws", "tune", "chains", "seed", "target_accept", "cores", "engine",
                 "mass_matrix", "init", "jitter", "smc_draws", "smc_chains", "evidence")


def check_sampler_settings(table: dict[str, Any] | None, *, file: str | None = None,
                           **overrides: Any) -> SamplerSettings:
    """Settings from a case's ``[sampler]`` table, then command-line overrides.

    Raises
    ------
    InputError
        A value of the wrong kind or out of range.
    """
    vals: dict[str, Any] = {}
    for src, where in ((table or {}, "sampler"), (overrides, "option")):
        for k, v in src.items():
            if v is None:
                continue
            fld = f"{where}.{k}" if where == "sampler" else f"--{k.replace('_', '-')}"
            if k == "target_accept":
                if isinstance(v, bool) or not isinstance(v, int | float) or not 0.5 <= v < 1:
                    raise InputError("must be a number in [0.5, 1)", file=file, field=fld,
                                     value=v)
                vals[k] = float(v)
            elif k in ("draws", "tune", "chains", "seed", "cores", "smc_draws", "smc_chains"):
                lo = 0 if k in ("seed", "tune") else 1
                if isinstance(v, bool) or not isinstance(v, int) or v < lo:
                    raise InputError(f"must be a whole number >= {lo}", file=file, field=fld,
                                     value=v)
                vals[k] = int(v)
            elif k == "evidence":
                vals[k] = bool(v)
            elif k == "jitter":
                if isinstance(v, bool) or not isinstance(v, int | float) or not 0 <= v <= 0.5:
                    raise InputError("must be a number in [0, 0.5]", file=file, field=fld,
                                     value=v)
                vals[k] = float(v)
            elif k == "engine":
                vals[k] = check_option("sampler engine", v, ENGINES, file=file, field=fld)
            elif k == "mass_matrix":
                vals[k] = check_option("mass-matrix adaptation", v, MASS_MATRICES, file=file,
                                       field=fld)
            elif k == "init":
                vals[k] = check_option("sampler init", v, PYMC_INITS, file=file, field=fld)
            else:
                raise InputError(f"unknown sampler setting; allowed: {list(_SAMPLER_KEYS)}",
                                 file=file, field=fld, value=v)
    if vals.get("chains", 4) < 2:
        raise InputError("the gate needs at least 2 chains (R-hat compares chains)",
                         file=file, field="chains", value=vals.get("chains"))
    return SamplerSettings(**vals)


# --------------------------------------------------------------------------- the model
def _jax_predictions(p: Problem, part: list[int]):
    """The JAX predictions of :func:`inversion.jaxmodel.predictions` as one pytensor
    operation (``wrap_jax``): its value and its gradient (by ``jax.vjp``) come from the
    single forward model of :mod:`inversion.kernel`."""
    from pytensor.link.jax.ops import wrap_jax

    from .jaxmodel import predictions

    f = predictions(p, part)
    if part:
        def planet_predictions(w, vol, lam, log10D):
            return f(w, vol, lam, log10D)
    else:
        import jax.numpy as jnp

        def planet_predictions(w, vol, lam):
            return f(w, vol, lam, jnp.zeros(0))
    return wrap_jax(planet_predictions)


def _prior_rv(name: str, spec: dict[str, Any], **kw: Any):
    import pymc as pm

    pars = {k: v for k, v in spec.items() if k != "dist"}
    return getattr(pm, spec["dist"])(name, **pars, **kw)


def end_member_sigma_dex(p: Problem, w: Any) -> np.ndarray:
    """Model 1-sigma [dex] of the fitted elements from the blocks' own uncertainties at
    weights ``w`` (K,): ``sqrt(sum_k (w_k Q_ki s_ki)^2) / sum_k w_k Q_ki``
    (:func:`inversion.kernel.end_member_variance`)."""
    fit = p.fit_index
    Q = np.asarray(p.Q, float)[:, fit]
    S = np.asarray(p.Q_sigma_dex, float)[:, fit]
    return np.sqrt(kernel.end_member_variance(np, Q, S, np.asarray(w, float)))


def build_model(p: Problem, priors: dict[str, dict[str, Any]] | None = None, *,
                y: np.ndarray | None = None):
    """The PyMC model of problem ``p``.

    Parameters
    ----------
    p : Problem
    priors : dict, optional
        Validated priors (:func:`check_priors`); defaults when omitted.
    y : ndarray, optional
        Observed log10 N of the fitted elements (defaults to ``p.y``; simulation studies
        pass synthetic data here).

    Returns
    -------
    pymc.Model
        Named dims ``components``, ``elements`` (fitted), ``partitioned`` (elements whose
        log10 D is a parameter), ``isotopes``. Free variables: ``w`` (when K > 1), the
        volatility parameters by name, ``lam`` (with a late component), ``log10D``,
        ``tau``; deterministics ``x`` (bulk mass fractions of the blocks), ``cmf``,
        ``mu`` (predicted log10 N of the fitted elements).
    """
    import pymc as pm
    import pytensor.tensor as pt

    priors = priors or default_priors(p)
    K = len(p.components)
    part = _partitioned(p)
    coords = {"components": list(p.components), "elements": p.fit_elements,
              "partitioned": [p.elements[j] for j in part],
              "isotopes": [d["name"] for d in p.isotopes]}
    y = p.y if y is None else np.asarray(y, float)
    form = get_form(p.volatility_form)
    with pm.Model(coords=coords) as model:
        if K > 1:
            a = priors["w"]["a"]
            a = np.full(K, a) if np.isscalar(a) else np.asarray(a, float)
            w = pm.Dirichlet("w", a=a, dims="components")
        else:
            w = pt.ones(1)
        vol = [_prior_rv(name, priors[name]) for name in form.params]
        if p.late_name is not None:
            lam = _prior_rv("lam", priors["lam"])
        else:
            lam = pt.as_tensor_variable(0.0)
        if part:
            mus = [priors[f"log10D_{p.elements[j]}"] for j in part]
            if all(s["dist"] == "Normal" for s in mus):
                log10D = pm.Normal("log10D", mu=np.array([s["mu"] for s in mus]),
                                   sigma=np.array([s["sigma"] for s in mus]),
                                   dims="partitioned")
            else:
                log10D = pt.stack([_prior_rv(f"log10D_{p.elements[j]}", s)
                                   for j, s in zip(part, mus, strict=True)])
                pm.Deterministic("log10D", log10D, dims="partitioned")
        tau = _prior_rv("tau", priors["tau"])
        pred = _jax_predictions(p, part)
        vol_v = pt.stack([pt.as_tensor_variable(v, dtype="float64") for v in vol])
        lam_v = pt.as_tensor_variable(lam, dtype="float64")
        if part:
            mu_v, em2, eps_v, eps_var, cmf_v, v_late = pred(w, vol_v, lam_v, log10D)
        else:
            mu_v, em2, eps_v, eps_var, cmf_v, v_late = pred(w, vol_v, lam_v)
        mu = pm.Deterministic("mu", mu_v, dims="elements")
        x = w / p.c_comp_R
        if K > 1:
            pm.Deterministic("x", x / pt.sum(x), dims="components")
        pm.Deterministic("cmf", cmf_v)
        # the squared uncertainties enter as data, not a constant: pytensor 2.38's
        # constant-inlining rewrite fails (harmlessly, but loudly) on the constant form
        sigma2 = pm.Data("sigma2_data", p.sigma ** 2, dims="elements")
        if p.Q_sigma_dex is not None and np.any(p.Q_sigma_dex[:, p.fit_index] > 0):
            # end-member uncertainties (errors in variables, marginalised to first order):
            # sigma_model_i = sqrt(sum_k (w_k Q_ki s_ki)^2) / sum_k w_k Q_ki  [dex]
            sigma2 = sigma2 + pm.Deterministic("sigma_model", pt.sqrt(em2),
                                               dims="elements") ** 2
        scale = pt.sqrt(sigma2 + tau ** 2)
        y_data = pm.Data("y_data", y, dims="elements")
        pm.StudentT(OBS_ELEMENTS, nu=STUDENT_NU, mu=mu, sigma=scale, observed=y_data,
                    dims="elements")
        if p.isotopes:
            # carrier-weighted balance and the variance widened by the end-members'
            # errors (inversion.kernel.isotope_variance):
            # sigma_obs^2 + sum_k phi_k^2 (s_k^2 + r_k^2 (eps_k - eps_mix)^2)
            eps = pm.Deterministic("eps_pred", eps_v, dims="isotopes")
            eps_sd = pm.Deterministic("eps_sigma", pt.sqrt(eps_var), dims="isotopes")
            # as data: simulation studies swap the observed anomalies without compiling
            eps_data = pm.Data("eps_data", np.array([iso["value"] for iso in p.isotopes]),
                               dims="isotopes")
            pm.Normal("eps_obs", mu=eps, sigma=eps_sd, observed=eps_data, dims="isotopes")
    return model


# --------------------------------------------------------------------------- sampling
@dataclass(frozen=True)
class Diagnostics:
    """The diagnostics gate (Vehtari et al. 2021): thresholds, values, verdict."""

    rhat_max: float
    ess_bulk_min: float
    divergences: int
    passed: bool
    worst_rhat: str
    worst_ess: str
    rhat_threshold: float = GATE_RHAT_MAX
    ess_bulk_threshold: float = GATE_ESS_BULK_MIN
    divergences_threshold: int = GATE_DIVERGENCES_MAX

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready view (``diagnostics.json``)."""
        return {"rhat_max": self.rhat_max, "ess_bulk_min": self.ess_bulk_min,
                "divergences": self.divergences, "passed": self.passed,
                "worst_rhat_parameter": self.worst_rhat, "worst_ess_parameter": self.worst_ess,
                "thresholds": {"rhat_max": self.rhat_threshold,
                               "ess_bulk_min": self.ess_bulk_threshold,
                               "divergences_max": self.divergences_threshold},
                "reference": "vehtari2021"}

    def messages(self) -> list[str]:
        """One line per failed criterion, saying what to do about it."""
        out = []
        if not self.rhat_max <= self.rhat_threshold:
            out.append(f"R-hat {self.rhat_max:.4f} > {self.rhat_threshold} ({self.worst_rhat}):"
                       " chains disagree; run longer (--tune, --draws) or check the priors")
        if not self.ess_bulk_min >= self.ess_bulk_threshold:
            out.append(f"bulk ESS {self.ess_bulk_min:.0f} < {self.ess_bulk_threshold:.0f} "
                       f"({self.worst_ess}): run more draws (--draws) or chains (--chains)")
        if self.divergences > self.divergences_threshold:
            out.append(f"{self.divergences} divergent transitions: raise [sampler] "
                       "target_accept (e.g. 0.95) or reparameterise the priors")
        return out


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


def parameter_names(model: Any) -> list[str]:
    """Names of the model's free parameters (constrained space)."""
    return [rv.name for rv in model.free_RVs]


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
        iv["tau"] = _inside(tau0 * (1 + jitter * rng.normal()), priors["tau"])
        out.append(iv)
    return out


def diagnose(idata: Any, names: list[str]) -> Diagnostics:
    """Apply the gate to the free parameters ``names`` of a posterior."""
    import arviz as az

    rh = az.rhat(idata, var_names=names)
    es = az.ess(idata, var_names=names, method="bulk")
    rmax, rname = -math.inf, ""
    emin, ename = math.inf, ""
    for n in names:
        r = np.atleast_1d(rh[n].values)
        e = np.atleast_1d(es[n].values)
        if r.size and np.nanmax(r) > rmax or not np.isfinite(r).all():
            rmax = float(np.max(r)) if np.isfinite(r).all() else math.inf
            rname = n
        if e.size and (np.nanmin(e) < emin or not np.isfinite(e).all()):
            emin = float(np.min(e)) if np.isfinite(e).all() else 0.0
            ename = n
    div = int(idata.sample_stats["diverging"].values.sum())
    passed = rmax <= GATE_RHAT_MAX and emin >= GATE_ESS_BULK_MIN and div <= GATE_DIVERGENCES_MAX
    return Diagnostics(rhat_max=float(rmax), ess_bulk_min=float(emin), divergences=div,
                       passed=bool(passed), worst_rhat=rname, worst_ess=ename)


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
    import pymc as pm

    from .fit import fit_problem

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
    model = build_model(p, priors, y=y)
    cores = settings.cores or min(settings.chains, os.cpu_count() or 1)
    if settings.engine == "nutpie":
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
    else:
        inits = start_points(p, priors, fit, settings.chains,
                             np.random.default_rng(jitter_seed), settings.jitter)
        t1 = time.perf_counter()
        with model:
            idata = pm.sample(draws=settings.draws, tune=settings.tune,
                              chains=settings.chains, cores=cores, random_seed=nuts_seed,
                              initvals=inits, init=settings.init,
                              target_accept=settings.target_accept, progressbar=progress,
                              compute_convergence_checks=False)
        # PyMC compiles inside pm.sample; its own sampling_time excludes that
        t_nuts = float(idata.posterior.attrs.get("sampling_time", time.perf_counter() - t1))
        t_compile = time.perf_counter() - t1 - t_nuts
    if log_likelihood:
        add_log_likelihood(p, idata)
    if posterior_predictive:
        add_posterior_predictive(p, idata, np.random.default_rng(ppc_seed))
    names = parameter_names(model)
    diag = diagnose(idata, names)
    lml = None
    smc_info: dict[str, Any] = {}
    if settings.evidence:
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
              "sampling_seconds": t_nuts, "total_seconds": time.perf_counter() - t0}
    return SampleResult(idata=idata, diagnostics=diag, settings=settings, seeds=seeds,
                        priors=priors, start=start, timing=timing,
                        log_marginal_likelihood=lml, smc=smc_info)


def _unconstrain_function(model: Any, order: list[str] | None = None):
    """Compiled map from constrained values of the free parameters (a dict) to the flat
    unconstrained vector, in the order of the value variables named in ``order`` (the
    sampler's order; default ``model.free_RVs``)."""
    import pytensor
    import pytensor.tensor as pt

    rvs = list(model.free_RVs)
    if order is not None:
        by_value = {model.rvs_to_values[rv].name: rv for rv in rvs}
        rvs = [by_value[n] for n in order]
    ins, outs, names = [], [], []
    for rv in rvs:
        x = rv.type()
        tr = model.rvs_to_transforms.get(rv)
        y = tr.forward(x, *rv.owner.inputs) if tr is not None else x
        ins.append(x)
        outs.append(pt.as_tensor_variable(y).ravel())
        names.append(rv.name)
    fn = pytensor.function(ins, pt.concatenate(outs), mode="FAST_COMPILE",
                           on_unused_input="ignore")
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

        from .jaxmodel import jax_setup

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


# --------------------------------------------------------------------------- outputs
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
    part = _partitioned(p)
    if part:
        D[:, part] = 10.0 ** post["log10D"].values.reshape(S, len(part))
    chain, draw = np.meshgrid(post["chain"].values, post["draw"].values, indexing="ij")
    return {"w": w, "vol": vol, "lam": lam, "D": D, "tau": post["tau"].values.reshape(S),
            "chain": chain.ravel(), "draw": draw.ravel()}


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
    from .handoff import planet_draws as handoff_draws
    from .planet import assemble

    d = posterior_arrays(p, idata)
    fwd = forward(p, d["w"], d["vol"], d["lam"], D=d["D"])
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
    ``sqrt(sigma**2 + tau**2)`` are computed per draw; ``z`` is the posterior median of
    their ratio. ``tail_probability`` is the posterior-predictive probability of a
    replicate at least as far from the model (Student-t, nu = 4).
    """
    from scipy import stats

    d = posterior_arrays(p, idata)
    fwd = forward(p, d["w"], d["vol"], d["lam"], D=d["D"])
    obs = np.isfinite(p.y_all)
    obs[p.ref_index] = False
    mu = fwd["log10N"][:, obs]
    y = p.y_all[obs]
    scale = np.sqrt(p.sigma_all[obs][None, :] ** 2 + d["tau"][:, None] ** 2)
    z_draws = (y[None, :] - mu) / scale
    z = np.median(z_draws, axis=0)
    tail = np.mean(2 * stats.t.sf(np.abs(z_draws), STUDENT_NU), axis=0)
    fitted = np.zeros(len(p.elements), dtype=bool)
    fitted[p.fit_index] = True
    els = np.array(p.elements)[obs]
    df = pd.DataFrame({
        "element": els, "tc50_K": p.tc[obs], "fitted": fitted[obs],
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


def compare_runs(idatas: dict[str, Any], *, evidence: dict[str, float | None] | None = None
                 ) -> pd.DataFrame:
    """Rank posteriors of the same target by PSIS-LOO (``arviz.compare``).

    Runs whose fitted element sets differ are compared on the elements they share: the
    pointwise log-likelihood of every other element is dropped (a LOO sum over different
    elements would not compare like with like), and ``table.attrs["left_out"]`` names,
    per run, the elements left out.

    Parameters
    ----------
    idatas : dict
        label -> InferenceData with a ``log_likelihood`` group holding ``y_obs``.
    evidence : dict, optional
        label -> log marginal likelihood (SMC); adds ``log_marginal_likelihood`` and
        ``log10_bayes_factor`` against the best-ranked run where known.

    Returns
    -------
    DataFrame
        ``arviz.compare`` columns (``elpd_loo``, ``se``, ``elpd_diff``, ``dse``, ``p_loo``,
        ``weight``, ``warning``...) and per run: ``within_uncertainty`` (True when
        ``|elpd_diff| <= 2 dse``: the difference from the best run is not resolved),
        ``pareto_k_max``, ``pareto_k_high`` (elements with k > 0.7) and ``reading`` (one
        sentence). ``attrs``: ``shared_elements``, ``left_out`` and ``pareto_k_advice``.

    Notes
    -----
    Pareto k is the shape of the tail fitted to the importance weights of each left-out
    element. Above 0.7 the importance-sampling estimate of that element's predictive
    density is unreliable (Vehtari, Gelman & Gabry 2017, Stat. Comput. 27, 1413;
    Vehtari et al. 2024, JMLR 25, 1): the element dominates its own fit (often an
    element off the trend). The remedy is to refit without that element and score it
    exactly, or to exclude it from both runs. A difference of less than about two of its
    standard errors is within its uncertainty (common practice).

    Raises
    ------
    InputError
        Fewer than two runs, a run without log-likelihood, runs sharing fewer than three
        elements, or different observed values of a shared element.
    """
    import arviz as az

    if len(idatas) < 2:
        raise InputError("give at least two result folders to compare", field="DIR")
    for label, idata in idatas.items():
        if "log_likelihood" not in idata.groups() or OBS_ELEMENTS not in idata.log_likelihood:
            raise InputError("the posterior has no log-likelihood of the elements",
                             file=label, field="log_likelihood")
    sets = {label: [str(e) for e in idata.observed_data[OBS_ELEMENTS]["elements"].values]
            for label, idata in idatas.items()}
    shared = [e for e in next(iter(sets.values()))
              if all(e in s for s in sets.values())]
    if len(shared) < 3:
        raise InputError(f"the runs share only {len(shared)} fitted elements ({shared}); "
                         "PSIS-LOO needs runs of the same target", field="observed_data")
    left_out = {label: [e for e in s if e not in shared] for label, s in sets.items()}
    ref_label = next(iter(idatas))
    ref_obs = idatas[ref_label].observed_data[OBS_ELEMENTS].sel(elements=shared)
    used = {}
    for label, idata in idatas.items():
        obs = idata.observed_data[OBS_ELEMENTS].sel(elements=shared)
        if not np.allclose(obs.values, ref_obs.values):
            bad = [e for e, a, b in zip(shared, obs.values, ref_obs.values, strict=True)
                   if not np.isclose(a, b)]
            raise InputError(f"observed values of {bad} differ from those of {ref_label}; "
                             "PSIS-LOO compares posteriors of the same target", file=label,
                             field="observed_data")
        used[label] = idata.sel(elements=shared) if left_out[label] else idata
    pareto: dict[str, tuple[float, list[str]]] = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = az.compare(used, ic="loo", var_name=OBS_ELEMENTS)
        for label, idata in used.items():
            k = np.asarray(az.loo(idata, pointwise=True, var_name=OBS_ELEMENTS).pareto_k)
            pareto[label] = (float(np.max(k)), [e for e, kk in zip(shared, k, strict=True)
                                                if kk > 0.7])
    table = table.reset_index().rename(columns={"index": "run"})
    diff = table["elpd_diff"].to_numpy(float)
    dse = table["dse"].to_numpy(float)
    table["within_uncertainty"] = np.abs(diff) <= 2.0 * dse
    table["pareto_k_max"] = [pareto[r][0] for r in table["run"]]
    table["pareto_k_high"] = [" ".join(pareto[r][1]) for r in table["run"]]
    reading = []
    for i, r in enumerate(table["run"]):
        if i == 0:
            text = "best by PSIS-LOO"
        elif table["within_uncertainty"].iloc[i]:
            text = (f"elpd difference {diff[i]:.2f} ± {dse[i]:.2f}: within its uncertainty "
                    "(< 2 standard errors), not distinguishable from the best")
        else:
            text = (f"elpd difference {diff[i]:.2f} ± {dse[i]:.2f}: worse than the best by "
                    f"{diff[i] / dse[i]:.1f} standard errors" if dse[i] > 0 else
                    f"elpd difference {diff[i]:.2f}")
        if pareto[r][1]:
            text += f"; Pareto k > 0.7 for {', '.join(pareto[r][1])}"
        reading.append(text)
    table["reading"] = reading
    if evidence:
        lml = [evidence.get(r) for r in table["run"]]
        table["log_marginal_likelihood"] = lml
        best = lml[0]
        table["log10_bayes_factor_vs_best"] = [
            (v - best) / math.log(10) if v is not None and best is not None else None
            for v in lml]
    table.attrs["shared_elements"] = shared
    table.attrs["left_out"] = {k: v for k, v in left_out.items() if v}
    table.attrs["pareto_k_advice"] = (
        "Pareto k > 0.7 marks an element whose left-out predictive density the importance "
        "sampling cannot estimate reliably: the element dominates its own fit (often one "
        "off the trend). Refit without it and score it exactly, or exclude it in every "
        "run, before reading the elpd differences.")
    return table


# --------------------------------------------------------------------------- calibration
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

    Each replicate draws parameters from the prior, simulates observations from the
    numpy forward model and the likelihood (``blocks="drawn"``: from building blocks
    whose ratios are drawn within their uncertainties, ``Q * 10**N(0, Q_sigma_dex)``, an
    errors-in-variables truth; ``"fixed"``: from ``p.Q`` itself), samples the posterior as
    :func:`sample` does (with ``fit_block_uncertainty=False`` the fitted model treats the
    blocks as exact: ``Q_sigma_dex`` dropped from the likelihood and the convex start)
    (NUTS from the jittered convex optimum; the log density is compiled once and reused
    with new data), and records the rank of the truth among ``thin_to`` thinned
    posterior draws and whether the central 90% interval covers it.

    Returns
    -------
    DataFrame
        One row per replicate and scalar parameter: ``replicate``, ``parameter``,
        ``truth``, ``rank`` (0..thin_to), ``covered90``, plus ``divergences``.
    """
    import pymc as pm
    from tqdm import tqdm

    from .fit import fit_problem

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
    model = build_model(p, priors)
    settings = SamplerSettings(draws=draws, tune=tune, chains=chains, seed=seed,
                               engine=engine, cores=cores)
    rows = []
    runner = _NutpieModel.build(model) if engine == "nutpie" else None
    step = None
    if runner is None:
        with model:
            step = pm.NUTS(target_accept=settings.target_accept)
    for r in tqdm(range(n_replicates), desc="SBC replicates", disable=not progress):
        truth = draw_prior(p, priors, rng)
        if blocks == "drawn":
            q_true = p.Q * 10.0 ** (rng.standard_normal(p.Q.shape) * q_sigma_sim)
            y = simulate(_replace(p, Q=q_true), truth, rng)
        else:
            y = simulate(p, truth, rng)
        fit = fit_problem(_with_y(p, y))
        if runner is not None:
            idata, _, _ = runner.run(p, priors, fit, settings, cores=cores,
                                     seed=int(rng.integers(2**31 - 1)),
                                     jitter_seed=int(rng.integers(2**31 - 1)),
                                     progress=False, y=y)
        else:
            inits = start_points(p, priors, fit, chains, rng, settings.jitter)
            with model:
                pm.set_data({"y_data": y})
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
