"""The forward model of :mod:`inversion.kernel` on JAX: exact gradients and the pieces of
the log density that the NUTS sampler runs.

:func:`predictions` returns one JAX function of the sampled parameters (building-block
weights, volatility parameters, late fraction, log10 D of the partitioned elements) that
gives everything the likelihood needs: the predicted log10 N of the fitted elements, the
end-member variance, the isotope predictions and their widened variances, and the planet's
core fraction. :mod:`inversion.bayes` wraps it as one PyMC operation (``pytensor``'s
``wrap_jax``), so priors, transforms, InferenceData and LOO stay PyMC's and ArviZ's while
the physics is the one implementation of :mod:`inversion.kernel`.

JAX runs in double precision (``jax_enable_x64``) and keeps compiled programs in a cache
on disk (``PLANETMIX_JAX_CACHE``, default ``~/.cache/planetmix/jax``), so the second run
of a case loads its log density instead of compiling it.
"""

from __future__ import annotations

import os
from dataclasses import replace
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np

from . import kernel

__all__ = ["jax_setup", "predictions", "PREDICTION_KEYS", "cache_dir", "pressure_range",
           "pressure_D", "condition_ranges", "conditions_D", "SAMPLED_CONDITIONS"]

#: Core-formation conditions the sampler may take as parameters, in argument order.
SAMPLED_CONDITIONS = ("pressure_GPa", "temperature_K", "dIW")

#: Outputs of :func:`predictions`, in order.
PREDICTION_KEYS = ("mu", "sigma_model2", "eps_pred", "eps_var", "cmf", "v",
                   "core_iron_margin")
_READY: list[bool] = []


def cache_dir() -> Path:
    """Folder of JAX's persistent compilation cache."""
    env = os.environ.get("PLANETMIX_JAX_CACHE")
    return Path(env) if env else Path.home() / ".cache" / "planetmix" / "jax"


def jax_setup() -> Any:
    """Import JAX in double precision with the persistent compilation cache; returns
    ``jax``. Idempotent."""
    os.environ.setdefault("JAX_PLATFORMS", "cpu")
    # one thread per computation: the arrays are tiny and the chains already run in
    # parallel, so XLA's intra-op thread pool only adds overhead (measured ~1.5x)
    os.environ.setdefault("XLA_FLAGS", "--xla_cpu_multi_thread_eigen=false "
                                       "intra_op_parallelism_threads=1")
    import jax

    if not _READY:
        jax.config.update("jax_enable_x64", True)
        # run each call in the calling thread: nutpie calls the log density once per
        # evaluation and waits for it, and handing a ~30 us computation to a worker
        # thread and back cost more than the computation (docs/forward_model.md)
        jax.config.update("jax_cpu_enable_async_dispatch", False)
        # XLA CPU devices for NumPyro's parallel chains (one per chain of the default 4):
        # on the 2-core machine this ran the demo at 1.5x the ESS per second of
        # sequential or vectorised chains (docs/forward_model.md). Only possible before
        # JAX's first computation; afterwards the chains run one after the other.
        try:
            jax.config.update("jax_num_cpu_devices", max(4, os.cpu_count() or 1))
        except RuntimeError:
            pass
        try:
            folder = cache_dir()
            folder.mkdir(parents=True, exist_ok=True)
            jax.config.update("jax_compilation_cache_dir", str(folder))
            jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.0)
            jax.config.update("jax_persistent_cache_min_entry_size_bytes", 0)
        except OSError:  # a read-only home: compile every time
            pass
        _READY.append(True)
    return jax


def pressure_range(p: Any) -> tuple[float, float] | None:
    """The pressure range [GPa] sampled as a parameter, or None (fixed conditions or the
    effective D). Set by ``planetmix sample`` from ``[core] pressure_GPa = [low, high]``
    in ``Problem.core_conditions["pressure_range_GPa"]``."""
    return condition_ranges(p).get("pressure_GPa")


def condition_ranges(p: Any) -> dict[str, tuple[float, float]]:
    """The core-formation conditions sampled as parameters and their ranges, in the order
    of :data:`SAMPLED_CONDITIONS`: ``Problem.core_conditions["ranges"]`` (set by
    :func:`inversion.conditions.start_problem` from ``[core]`` values given as
    ``[low, high]``), or the older ``pressure_range_GPa`` entry."""
    cc = getattr(p, "core_conditions", None) or {}
    r = dict(cc.get("ranges") or {})
    if "pressure_range_GPa" in cc and "pressure_GPa" not in r:
        r["pressure_GPa"] = cc["pressure_range_GPa"]
    return {k: (float(r[k][0]), float(r[k][1])) for k in SAMPLED_CONDITIONS if k in r}


@lru_cache(maxsize=8)
def _chemistry(elements: tuple[str, ...], activity: str = "ideal") -> Any:
    """The compiled regressions of an element axis and ``[core] metal_activity`` (read
    once per axis: the priors, the start points and the posterior products ask for them)."""
    from . import partitioning as pt

    return pt.compile_chemistry(elements, oxygen=False, activity=activity)


def conditions_D(p: Any) -> tuple[np.ndarray, Any]:
    """The metal/silicate D of the regression elements as a function of (P, T, dIW).

    Returns ``(mask, D_of)``: ``D_of(P, T=None, dIW=None, xp=np)`` gives the (n,) mass D
    at pressure P [GPa], temperature T [K] (None: the case's, fixed or the peridotite
    liquidus at P) and dIW (None: the one in ``p.core_conditions``), with the mean molar
    masses of ``p.core_conditions`` (held at the start of the sampling), the problem's
    own D elsewhere.
    """
    from . import partitioning as pt

    cc = p.core_conditions
    # the metal activity model of the case; the metal's Si and S (its activities) and the
    # mean molar masses are held at the values in core_conditions (planetmix sample: the
    # convex fit's converged metal, conditions.sampling_start)
    chem = _chemistry(tuple(p.elements), (cc.get("metal_activity") or {}).get("model", "ideal"))
    mask = np.isin(chem.kind, (1, 2))
    mask[p.fe_index] = False
    base = np.asarray(p.D, float)
    liquidus = "liquidus" in str(cc.get("temperature_from", "")).lower()
    T_fixed = float(cc["temperature_K"])
    dIW_fixed = float(cc["dIW"])
    state = np.array([0.5, float(cc["Mbar_sil_g_mol"]), float(cc["Mbar_met_g_mol"]),
                      float(cc.get("x_Si_metal", 0.0)), float(cc.get("x_S_metal", 0.0))])

    def D_of(P: Any, T: Any = None, dIW: Any = None, xp: Any = np) -> Any:
        if T is None:
            T = pt.peridotite_liquidus(P, xp=xp) if liquidus else T_fixed
        Dm = pt.mass_D(chem, P, T, dIW_fixed if dIW is None else dIW, state, xp=xp)
        return xp.where(mask, Dm, base)

    return mask, D_of


def pressure_D(p: Any) -> tuple[np.ndarray, Any]:
    """The metal/silicate D of the regression elements as a function of pressure.

    Returns ``(mask, D_of_P)``: ``mask`` (n,) marks the elements whose D follows the
    regressions of :mod:`inversion.partitioning`; ``D_of_P(P, xp)`` gives the (n,) mass
    D at pressure P [GPa] with the temperature of the case (fixed, or the peridotite
    liquidus at P) and the dIW and mean molar masses recorded in ``p.core_conditions``
    (held at their values at the start of the sampling: the convex path iterates them
    with the fitted core, the sampler does not), the problem's own D elsewhere.
    """
    mask, D_of = conditions_D(p)

    def D_of_P(P: Any, xp: Any = np) -> Any:
        return D_of(P, None, None, xp)

    return mask, D_of_P


def predictions(p: Any, partitioned: list[int] | tuple[int, ...] = ()) -> Any:
    """The JAX function ``f(w, vol, lam, log10D) -> tuple`` of problem ``p``.

    Parameters
    ----------
    p : Problem
    partitioned : indices of the elements whose log10 D is a parameter

    Returns
    -------
    callable
        ``f(w (K,), vol (p,), lam (), log10D (len(partitioned),), *conditions)`` (the
        sampled core-formation conditions of :func:`condition_ranges`, in the order of
        :data:`SAMPLED_CONDITIONS`: P [GPa], T [K], dIW) returning the arrays
        of :data:`PREDICTION_KEYS`: ``mu`` (n_fit,) predicted log10 N of the fitted
        elements; ``sigma_model2`` (n_fit,) end-member variance [dex^2] (zeros without
        block uncertainties); ``eps_pred``, ``eps_var`` (n_iso,) isotope predictions and
        widened variances; ``cmf``, ``v`` scalars; ``core_iron_margin`` scalar, core iron
        over bulk iron (negative: no physical planet, :func:`inversion.kernel.
        physical_state`).
    """
    jax_setup()
    import jax.numpy as jnp

    c = kernel.static_of(p)
    fit = np.asarray(p.fit_index)
    D0 = np.asarray(p.D, float)
    part = np.asarray(partitioned, dtype=int)
    q_sig = getattr(p, "Q_sigma_dex", None)
    has_em = q_sig is not None and bool(np.any(np.asarray(q_sig)[:, fit] > 0))
    Q_fit = np.asarray(p.Q, float)[:, fit]
    S_fit = np.asarray(q_sig, float)[:, fit] if has_em else None
    isotopes = [{k: (np.asarray(v, float) if isinstance(v, np.ndarray) else v)
                 for k, v in d.items()} for d in p.isotopes]

    sampled = list(condition_ranges(p))
    D_of = conditions_D(p)[1] if sampled else None
    P_fixed = float((p.core_conditions or {}).get("pressure_GPa", np.nan))

    def f(w: Any, vol: Any, lam: Any, log10D: Any, *conds: Any) -> tuple[Any, ...]:
        cv = dict(zip(sampled, conds, strict=True))
        cs = c
        if D_of is None:
            D = jnp.asarray(D0)
        else:
            D = D_of(cv.get("pressure_GPa", P_fixed), cv.get("temperature_K"),
                     cv.get("dIW"), jnp)
            if "dIW" in cv:  # a sampled dIW sets the iron split too
                cs = replace(c, dIW=cv["dIW"])
        if part.size:
            D = D.at[part].set(10.0 ** log10D)
        out = kernel.forward(jnp, cs, w, vol, lam, D)
        mu = out["log10N"][fit]
        em = (kernel.end_member_variance(jnp, Q_fit, S_fit, w) if has_em
              else jnp.zeros(fit.size))
        preds, vars_ = [], []
        for iso in isotopes:
            e, var = kernel.isotope_variance(jnp, iso, w, out["v"])
            preds.append(e)
            vars_.append(var)
        eps = jnp.stack(preds) if preds else jnp.zeros(0)
        eps_var = jnp.stack(vars_) if vars_ else jnp.zeros(0)
        return mu, em, eps, eps_var, out["cmf"], out["v"], out["core_iron_margin"]

    return f
