"""Settings of a NUTS run and their validation (``[sampler]``)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from ..exceptions import InputError
from ..options import check_option

__all__ = ["SamplerSettings", "ENGINES", "MASS_MATRICES", "CHAIN_METHODS", "PYMC_INITS",
           "check_sampler_settings"]

@dataclass(frozen=True)
class SamplerSettings:
    """Settings of a NUTS run (recorded in every result).

    Defaults: 4 chains of 1000 tuning and 1000 kept draws at target acceptance 0.9,
    which pass the gate on the library's cases (bulk ESS >= 400 needs about 100
    effective draws per chain). ``mass_matrix`` is one of :data:`MASS_MATRICES`
    (which engine takes which is listed there); ``chain_method`` (NumPyro only) one of
    :data:`CHAIN_METHODS`. ``engine`` chooses the NUTS implementation:
    ``"numpyro"`` (default; NumPyro's NUTS on the JAX log density, the whole sampler
    compiled by XLA, the chains in parallel threads: the fastest to a result on the demo,
    docs/forward_model.md; the log density is exported to disk keyed by the model, so a
    second run loads it without building the PyMC model, :mod:`inversion.bayes.warm`),
    ``"nutpie"`` (nutpie's NUTS calling the same JAX log density from Rust, chains in
    threads; compiles once and swaps data, which is what the calibration runs use) or
    ``"pymc"`` (PyMC's own NUTS in Python, chains in processes; slowest per draw, kept
    for cross-checks).
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
    engine: str = "numpyro"
    mass_matrix: str = "draw-variance"
    chain_method: str = "parallel"
    warmup_tree_depth: int = 5


#: NUTS implementations (``[sampler] engine``, ``--engine``).
ENGINES = ("nutpie", "numpyro", "pymc")
#: Mass-matrix adaptation (``[sampler] mass_matrix``): ``draw-variance`` (diagonal, from
#: the variance of the tuning draws, as Stan and PyMC adapt it; every engine, the
#: default: with nutpie on the four-block demo planet it gave 1.7-2.6x the minimum bulk
#: ESS of the gradient-based estimate at 1.6x the time), ``gradient-variance`` (nutpie's
#: own diagonal estimate from draws and gradients; nutpie only), ``low-rank`` (diagonal
#: plus a low-rank correction for correlated parameters; nutpie only), ``dense`` (the
#: full covariance of the tuning draws; NumPyro only: on the demo it shortens the kept
#: trajectories, 20 against 31 leapfrog steps per draw, but tuning takes 1.55x the steps,
#: so a run costs more; docs/forward_model.md).
MASS_MATRICES = ("draw-variance", "gradient-variance", "low-rank", "dense")
#: Which engines take which mass matrix (the others raise an InputError).
_MASS_ENGINES = {"draw-variance": ("nutpie", "numpyro", "pymc"),
                 "gradient-variance": ("nutpie",), "low-rank": ("nutpie",),
                 "dense": ("numpyro",)}
#: How NumPyro runs the chains (``[sampler] chain_method``): ``parallel`` (the default:
#: one XLA CPU device per chain, in threads; :func:`inversion.jaxmodel.jax_setup` makes
#: the devices, and with fewer devices than chains they run one after the other),
#: ``sequential`` (one after the other) or ``vectorized`` (one program, the chains in
#: step, each tree as deep as the deepest chain's). Measured on the demo
#: (docs/forward_model.md): parallel 1.45x the ESS per second of the other two.
CHAIN_METHODS = ("parallel", "sequential", "vectorized")
#: Deepest NUTS tree during the warm-up (``[sampler] warmup_tree_depth``; NumPyro only;
#: the kept draws may go to depth 10 whatever it is). Early warm-up iterations, with an
#: unadapted mass matrix and step size, otherwise build trees of hundreds of leapfrog
#: steps: on the demo the first 100 warm-up iterations cost 290-330 steps each, a third
#: of a run. Capped at 5 (at most 31 steps, what a kept draw takes there), a run took
#: 0.63-0.65x the gradient evaluations for the same or a larger smallest ESS (1.45-1.9x
#: ESS per gradient over two start seeds; docs/forward_model.md). The kept draws are
#: exact NUTS whatever the warm-up did; only the adaptation is affected.
WARMUP_TREE_DEPTH_RANGE = (1, 10)
#: PyMC initialisations of the mass matrix (``[sampler] init``; ``engine = "pymc"`` only).
PYMC_INITS = ("adapt_diag", "jitter+adapt_diag", "adapt_full", "jitter+adapt_full")
_SAMPLER_KEYS = ("draws", "tune", "chains", "seed", "target_accept", "cores", "engine",
                 "mass_matrix", "chain_method", "init", "jitter", "smc_draws", "smc_chains",
                 "evidence", "warmup_tree_depth")


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
            elif k == "warmup_tree_depth":
                lo, hi = WARMUP_TREE_DEPTH_RANGE
                if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
                    raise InputError(f"must be a whole number in [{lo}, {hi}]", file=file,
                                     field=fld, value=v)
                vals[k] = int(v)
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
            elif k == "chain_method":
                vals[k] = check_option("chain method", v, CHAIN_METHODS, file=file,
                                       field=fld)
            elif k == "init":
                vals[k] = check_option("sampler init", v, PYMC_INITS, file=file, field=fld)
            else:
                raise InputError(f"unknown sampler setting; allowed: {list(_SAMPLER_KEYS)}",
                                 file=file, field=fld, value=v)
    if vals.get("chains", 4) < 2:
        raise InputError("the gate needs at least 2 chains (R-hat compares chains)",
                         file=file, field="chains", value=vals.get("chains"))
    engine = vals.get("engine", SamplerSettings.engine)
    mass = vals.get("mass_matrix", SamplerSettings.mass_matrix)
    if engine not in _MASS_ENGINES[mass]:
        fld = ("--mass-matrix" if overrides.get("mass_matrix") is not None
               else "sampler.mass_matrix")
        raise InputError(f"mass matrix {mass!r} is not available with engine {engine!r} "
                         f"(engines taking it: {list(_MASS_ENGINES[mass])})", file=file,
                         field=fld, value=mass)
    if "warmup_tree_depth" in vals and engine != "numpyro":
        fld = ("--warmup-tree-depth" if overrides.get("warmup_tree_depth") is not None
               else "sampler.warmup_tree_depth")
        raise InputError(f"warmup_tree_depth is a setting of engine 'numpyro', not "
                         f"{engine!r}", file=file, field=fld,
                         value=vals["warmup_tree_depth"])
    return SamplerSettings(**vals)
