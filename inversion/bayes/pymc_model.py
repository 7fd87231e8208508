"""The PyMC model: priors, the single forward model on JAX as one operation
(:mod:`inversion.jaxmodel`), the likelihood.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .. import kernel
from ..jaxmodel import condition_ranges
from ..model import Problem
from ..volatility import get_form
from .priors import _partitioned, default_priors

__all__ = ["STUDENT_NU", "OBS_ELEMENTS", "end_member_sigma_dex", "build_model", "parameter_names"]

#: Degrees of freedom of the Student-t likelihood (docs/model.md section 8).
STUDENT_NU = 4.0
#: Observed variable names in the model.
OBS_ELEMENTS = "y_obs"


def _jax_predictions(p: Problem, part: list[int]):
    """The JAX predictions of :func:`inversion.jaxmodel.predictions` as one pytensor
    operation (``wrap_jax``): its value and its gradient (by ``jax.vjp``) come from the
    single forward model of :mod:`inversion.kernel`."""
    import jax.numpy as jnp
    from pytensor.link.jax.ops import wrap_jax

    from ..jaxmodel import predictions

    f = predictions(p, part)
    if part:
        def planet_predictions(w, vol, lam, log10D, *P):
            return f(w, vol, lam, log10D, *P)
    else:
        def planet_predictions(w, vol, lam, *P):
            return f(w, vol, lam, jnp.zeros(0), *P)
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
        # the core-formation conditions sampled (P, T, dIW in this order): the D of the
        # regression elements follow them, a sampled dIW sets the iron split too
        P_args = [pt.as_tensor_variable(_prior_rv(name, priors[name]), dtype="float64")
                  for name in condition_ranges(p)]
        tau = _prior_rv("tau", priors["tau"])
        pred = _jax_predictions(p, part)
        vol_v = pt.stack([pt.as_tensor_variable(v, dtype="float64") for v in vol])
        lam_v = pt.as_tensor_variable(lam, dtype="float64")
        args = (w, vol_v, lam_v, log10D, *P_args) if part else (w, vol_v, lam_v, *P_args)
        mu_v, em2, eps_v, eps_var, cmf_v, v_late, fe_margin = pred(*args)
        mu = pm.Deterministic("mu", mu_v, dims="elements")
        x = w / p.c_comp_R
        if K > 1:
            pm.Deterministic("x", x / pt.sum(x), dims="components")
        pm.Deterministic("cmf", cmf_v)
        # support: a mantle that needs more iron than the bulk holds leaves a negative
        # core iron mass, which is no planet (zero density there; the convex fit's iron
        # budget constraint)
        pm.Potential("core_iron_nonnegative",
                     pt.switch(pt.ge(fe_margin, 0.0), 0.0, -np.inf))
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


def parameter_names(model: Any) -> list[str]:
    """Names of the model's free parameters (constrained space)."""
    return [rv.name for rv in model.free_RVs]
