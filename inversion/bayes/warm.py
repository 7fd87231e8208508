"""The log density on disk: ``jax.export`` of the PyMC model, keyed by its content, and
NumPyro's NUTS run on it.

A run of a case compiles the PyMC model's log density once (pytensor's rewrites, its
translation to JAX, JAX's tracing and lowering) and serialises three lowered functions
of the flat unconstrained vector ``x`` (the sampler's space) with :mod:`jax.export`:

- ``logp_grad(x)``: the model's log density (priors with their Jacobians, likelihoods,
  potentials) and its gradient, one function (JAX's reverse-mode gradient of the
  translated PyMC graph, lowered with it; a separately serialised VJP would run the
  forward model a second time);
- ``constrain(x)``: the free parameters back in the constrained space and the
  deterministics, in the order of :data:`ExportedModel.outputs`;
- ``unconstrain(values)``: the map from constrained start values to ``x``.

They are written to ``<cache>/<key>/`` with a JSON record of the variable names, shapes,
dims, coordinates and the observed and constant data, and the SHA-256 of every file.
``key`` is the SHA-256 of everything that defines the model: the compiled problem (every
field of :class:`inversion.model.Problem`, arrays by dtype, shape and bytes), the priors,
the observed data, the source of the ``inversion`` package, the partitioning tables, the
versions of JAX, jaxlib, PyMC, pytensor and NumPyro, the JAX backend and the schema of
this module. A later run of the same model loads the functions instead of building the
PyMC model; an entry whose record, key or file digests do not match is ignored and
written again. Where the cache lives: :func:`export_cache_dir`.

:func:`sample_numpyro` is the default engine's path (``engine = "numpyro"``): NumPyro's
NUTS with ``potential_fn = -logp`` on the deserialised function, the start points of
:func:`inversion.bayes.engines.start_points` mapped by ``unconstrain``, the draws mapped
by ``constrain``, the InferenceData built as PyMC's NumPyro path builds it (posterior in
the constrained space with the model's names and dims, sample_stats, observed and
constant data). A cold and a warm run sample the same deserialised function, so the same
seed gives the same draws.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
import time
from dataclasses import dataclass, fields, is_dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["SCHEMA", "export_cache_dir", "model_key", "ExportedModel", "load_or_build",
           "sample_numpyro"]

#: Version of the on-disk layout and of what the key covers (bump on a change).
SCHEMA = 1
_FILES = ("logp_grad.bin", "constrain.bin", "unconstrain.bin")
_ROOT = Path(__file__).resolve().parents[1]


def export_cache_dir() -> Path:
    """Folder of the exported log densities: ``PLANETMIX_EXPORT_CACHE`` when set; else
    ``exported`` inside ``PLANETMIX_JAX_CACHE`` when that is set (a temporary XLA cache
    of a test or benchmark keeps both together); else ``~/.cache/planetmix/exported``,
    beside the XLA cache ``~/.cache/planetmix/jax`` of
    :func:`inversion.jaxmodel.cache_dir`."""
    env = os.environ.get("PLANETMIX_EXPORT_CACHE")
    if env:
        return Path(env)
    from ..jaxmodel import cache_dir

    if os.environ.get("PLANETMIX_JAX_CACHE"):
        return cache_dir() / "exported"
    return cache_dir().parent / "exported"


def _feed(h: Any, obj: Any) -> None:
    """Feed ``obj`` to hasher ``h`` canonically (type-tagged, dict keys sorted)."""
    if obj is None or isinstance(obj, bool | int | str):
        h.update(f"{type(obj).__name__}:{obj!r};".encode())
    elif isinstance(obj, float | np.floating):
        h.update(f"f:{float(obj).hex()};".encode())
    elif isinstance(obj, np.integer | np.bool_):
        h.update(f"i:{int(obj)};".encode())
    elif isinstance(obj, np.ndarray):
        a = np.ascontiguousarray(obj)
        h.update(f"a:{a.dtype.str}:{a.shape};".encode())
        if a.dtype == object:
            for v in a.ravel():
                _feed(h, v)
        else:
            h.update(a.tobytes())
    elif isinstance(obj, dict):
        h.update(f"d:{len(obj)};".encode())
        for k in sorted(obj, key=str):
            _feed(h, str(k))
            _feed(h, obj[k])
    elif isinstance(obj, list | tuple):
        h.update(f"l:{len(obj)};".encode())
        for v in obj:
            _feed(h, v)
    elif is_dataclass(obj):
        h.update(f"dc:{type(obj).__qualname__};".encode())
        for f in fields(obj):
            _feed(h, f.name)
            _feed(h, getattr(obj, f.name))
    else:  # anything else by its text (an object address only makes the key miss)
        h.update(f"r:{type(obj).__qualname__}:{obj!r};".encode())


def _versions() -> dict[str, str]:
    from importlib import metadata

    out = {}
    for name in ("planetmix", "jax", "jaxlib", "pymc", "pytensor", "numpyro"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "none"
    return out


@lru_cache(maxsize=1)
def _source_digest() -> str:
    """SHA-256 of the ``inversion`` package's Python source and the partitioning tables
    (what a changed model is made of even at the same package version); read once per
    process."""
    h = hashlib.sha256()
    import components

    files = sorted(_ROOT.rglob("*.py")) + sorted(
        (Path(components.DATA_DIR) / "partitioning").glob("*"))
    for f in files:
        if f.is_file():
            h.update(str(f.relative_to(f.parents[1])).encode())
            h.update(f.read_bytes())
    return h.hexdigest()


def model_key(p: Any, priors: dict[str, dict[str, Any]], y: np.ndarray | None = None
              ) -> str:
    """SHA-256 (hex) of everything that defines the log density of problem ``p`` with
    ``priors`` and observations ``y`` (``p.y`` when None)."""
    from ..jaxmodel import jax_setup

    jax = jax_setup()
    h = hashlib.sha256()
    _feed(h, {"schema": SCHEMA, "versions": _versions(), "source": _source_digest(),
              "backend": jax.default_backend(), "x64": bool(jax.config.jax_enable_x64)})
    _feed(h, p)
    _feed(h, priors)
    _feed(h, np.asarray(p.y if y is None else y, float))
    return h.hexdigest()


@dataclass
class ExportedModel:
    """The three exported functions of a model and their record."""

    key: str
    logp_grad: Any
    constrain: Any
    unconstrain: Any
    meta: dict[str, Any]
    #: ``"built"`` (exported in this run) or ``"loaded"`` (from the cache)
    origin: str
    seconds: float

    @property
    def size(self) -> int:
        """Length of the unconstrained vector."""
        return int(sum(self.meta["value_sizes"]))

    @property
    def outputs(self) -> list[str]:
        """Names of the outputs of ``constrain`` (posterior variables)."""
        return list(self.meta["outputs"])

    @property
    def parameter_names(self) -> list[str]:
        """The free parameters (constrained space), as :func:`parameter_names`."""
        return list(self.meta["free"])

    def potential(self) -> Any:
        """NumPyro's potential, ``-logp(x)``, differentiable by ``jax.grad`` (its
        gradient is the exported one) and batchable by ``jax.vmap`` (vectorised chains:
        the batch runs through the exported function one row after the other, since an
        exported call has no batching rule of its own)."""
        import jax
        from jax.custom_batching import custom_vmap

        call = self.logp_grad.call
        vg = custom_vmap(call)

        @vg.def_vmap
        def _rows(axis_size: int, in_batched: Any, x: Any) -> Any:
            return jax.lax.map(call, x), (True, True)

        @jax.custom_vjp
        def potential(x: Any) -> Any:
            return -vg(x)[0]

        def fwd(x: Any) -> Any:
            v, g = vg(x)
            return -v, g

        def bwd(g: Any, ct: Any) -> Any:
            return (-ct * g,)

        potential.defvjp(fwd, bwd)
        return potential

    def to_constrained(self, x: np.ndarray) -> dict[str, Any]:
        """The free parameters (constrained, by name) at the unconstrained point ``x``."""
        outs = dict(zip(self.outputs, self.constrain.call(np.asarray(x, float)),
                        strict=True))
        return {n: (float(outs[n]) if np.ndim(outs[n]) == 0 else np.asarray(outs[n]))
                for n in self.meta["free"]}

    def to_unconstrained(self, values: dict[str, Any]) -> np.ndarray:
        """Flat unconstrained vector of constrained start values (by free-RV name)."""
        args = [np.asarray(values[n], float).reshape(s)
                for n, s in zip(self.meta["free"], self.meta["free_shapes"], strict=True)]
        return np.asarray(self.unconstrain.call(*args))


def _load(folder: Path, key: str) -> ExportedModel | None:
    """The entry in ``folder`` if its record, key and file digests all match, else None."""
    from jax import export

    try:
        meta = json.loads((folder / "meta.json").read_text(encoding="utf-8"))
        if meta.get("schema") != SCHEMA or meta.get("key") != key:
            return None
        funcs = []
        for name in _FILES:
            blob = (folder / name).read_bytes()
            if hashlib.sha256(blob).hexdigest() != meta["digests"][name]:
                return None
            funcs.append(export.deserialize(bytearray(blob)))
    except Exception:  # unreadable, malformed, or the deserialiser's error: rebuild
        return None
    return ExportedModel(key, *funcs, meta=meta, origin="loaded", seconds=0.0)


def _export(p: Any, priors: dict[str, dict[str, Any]], y: np.ndarray | None
            ) -> tuple[list[Any], dict[str, Any]]:
    """Build the PyMC model and export (lower) its three functions."""
    import jax
    import jax.numpy as jnp
    from jax import export
    from pymc.backends.arviz import (
        coords_and_dims_for_inferencedata,
        find_constants,
        find_observations,
    )
    from pymc.sampling.jax import get_jaxified_graph, get_jaxified_logp
    from pymc.util import get_default_varnames

    from .pymc_model import build_model

    model = build_model(p, priors, y=y)
    ip = model.initial_point()
    values = model.value_vars
    shapes = [tuple(int(d) for d in np.shape(ip[v.name])) for v in values]
    sizes = [int(np.prod(s)) for s in shapes]
    n = int(sum(sizes))
    offsets = np.cumsum([0, *sizes])

    def unravel(x: Any) -> list[Any]:
        return [x[offsets[i]:offsets[i + 1]].reshape(s) for i, s in enumerate(shapes)]

    # negative_logp=True returns the log density itself (PyMC negates when False)
    logp_fn = get_jaxified_logp(model, negative_logp=True)
    outs = list(get_default_varnames(model.unobserved_value_vars, include_transformed=False))
    post_fn = get_jaxified_graph(inputs=values, outputs=outs)
    # constrained free values -> unconstrained flat vector, in the order of value_vars
    from .engines import unconstrain_graph

    rvs = [model.values_to_rvs[v] for v in values]
    ins, flat = unconstrain_graph(model, rvs)
    unc_fn = get_jaxified_graph(inputs=ins, outputs=[flat])
    x_spec = jax.ShapeDtypeStruct((n,), jnp.float64)
    e_logp = export.export(jax.jit(jax.value_and_grad(lambda x: logp_fn(unravel(x)))))(
        x_spec)
    e_post = export.export(jax.jit(lambda x: tuple(post_fn(*unravel(x)))))(x_spec)
    # the constrained shape of each free RV (a simplex has one more entry than its value)
    by_name = {o.name: tuple(int(d) for d in a.shape)
               for o, a in zip(outs, e_post.out_avals, strict=True)}
    free_shapes = [by_name[rv.name] for rv in rvs]
    e_unc = export.export(jax.jit(lambda *a: unc_fn(*a)[0]))(
        *[jax.ShapeDtypeStruct(s, jnp.float64) for s in free_shapes])
    post_shapes = [tuple(int(d) for d in o.shape) for o in e_post.out_avals]
    coords, dims = coords_and_dims_for_inferencedata(model)
    obs = {k: np.asarray(v) for k, v in find_observations(model).items()}
    const = {k: np.asarray(v) for k, v in find_constants(model).items()}

    def arr(d: dict[str, np.ndarray]) -> dict[str, Any]:
        return {k: {"dtype": v.dtype.str, "shape": list(v.shape), "values": v.ravel().tolist()}
                for k, v in d.items()}

    meta = {"schema": SCHEMA, "values": [v.name for v in values],
            "value_shapes": [list(s) for s in shapes], "value_sizes": sizes,
            "free": [rv.name for rv in rvs], "free_shapes": [list(s) for s in free_shapes],
            "outputs": [o.name for o in outs], "output_shapes": [list(s) for s in post_shapes],
            "coords": {k: [str(c) if not isinstance(c, int | float) else c for c in v]
                       for k, v in coords.items()},
            "dims": {k: list(v) for k, v in dims.items()},
            "observed_data": arr(obs), "constant_data": arr(const),
            "parameter_names": [rv.name for rv in model.free_RVs]}
    return [e_logp, e_post, e_unc], meta


def _write(root: Path, key: str, blobs: list[bytes], meta: dict[str, Any]) -> None:
    """Write the entry atomically (a temporary folder renamed into place)."""
    root.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{key[:12]}-", dir=root))
    try:
        meta = {**meta, "key": key, "digests": {}}
        for name, blob in zip(_FILES, blobs, strict=True):
            (tmp / name).write_bytes(blob)
            meta["digests"][name] = hashlib.sha256(blob).hexdigest()
        (tmp / "meta.json").write_text(json.dumps(meta), encoding="utf-8")
        dest = root / key
        if dest.exists():
            shutil.rmtree(dest, ignore_errors=True)
        os.replace(tmp, dest)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)


def load_or_build(p: Any, priors: dict[str, dict[str, Any]], y: np.ndarray | None = None,
                  *, cache: Path | None = None) -> ExportedModel:
    """The exported log density of ``(p, priors, y)``: loaded from the cache when a valid
    entry exists, else built from the PyMC model, written, and loaded back from its
    serialised form (so a cold and a warm run call the same deserialised function)."""
    from jax import export

    from ..jaxmodel import jax_setup

    jax_setup()
    t = time.perf_counter()
    key = model_key(p, priors, y)
    root = export_cache_dir() if cache is None else Path(cache)
    got = _load(root / key, key)
    if got is not None:
        got.seconds = time.perf_counter() - t
        return got
    funcs, meta = _export(p, priors, y)
    try:
        blobs = [bytes(e.serialize()) for e in funcs]
    except ImportError:  # no flatbuffers (a dependency): sample the in-memory functions
        blobs = None
    if blobs is not None:
        try:
            _write(root, key, blobs, meta)
        except OSError:  # a read-only cache: the functions of this run only
            pass
        funcs = [export.deserialize(bytearray(b)) for b in blobs]
    return ExportedModel(key, *funcs, meta={**meta, "key": key}, origin="built",
                         seconds=time.perf_counter() - t)


def _array(d: dict[str, Any]) -> np.ndarray:
    return np.asarray(d["values"], dtype=np.dtype(d["dtype"])).reshape(d["shape"])


def _stats(mcmc: Any) -> dict[str, np.ndarray]:
    """NumPyro's extra fields under PyMC's names (as ``pymc.sampling.jax`` does)."""
    rename = {"potential_energy": "lp", "adapt_state.step_size": "step_size",
              "num_steps": "n_steps", "accept_prob": "acceptance_rate"}
    data = {}
    for stat, value in mcmc.get_extra_fields(group_by_chain=True).items():
        if isinstance(value, dict | tuple):
            continue
        value = np.asarray(value).copy()
        data[rename.get(stat, stat)] = value
        if stat == "num_steps":
            data["tree_depth"] = np.log2(value).astype(int) + 1
    return data


#: JAX's recorded spans of tracing, lowering and compiling (a compile served by the
#: persistent cache included), whose union :class:`_ProgramClock` measures.
_PROGRAM_EVENTS = ("/jax/core/compile/jaxpr_trace_duration",
                   "/jax/core/compile/jaxpr_to_mlir_module_duration",
                   "/jax/core/compile/backend_compile_duration")
_SPANS: list[list[tuple[float, float]]] = []


def _on_span(event: str, start: float, end: float, **_: Any) -> None:
    if _SPANS and event in _PROGRAM_EVENTS:
        _SPANS[-1].append((start, end))


class _ProgramClock:
    """Wall seconds JAX spends preparing programs inside a ``with`` block: the union of
    its trace, lowering and compile (or cache load) time spans (nested spans, such as an
    inner function traced inside an outer one, counted once)."""

    _registered = False

    def __enter__(self) -> _ProgramClock:
        import jax

        if not _ProgramClock._registered:
            jax.monitoring.register_event_time_span_listener(_on_span)
            _ProgramClock._registered = True
        _SPANS.append([])
        self.seconds = 0.0
        return self

    def __exit__(self, *exc: Any) -> None:
        spans = sorted(_SPANS.pop())
        total, end = 0.0, -np.inf
        for a, b in spans:
            if b > end:
                total += b - max(a, end)
                end = b
        self.seconds = total


def sample_numpyro(em: ExportedModel, x0: np.ndarray, *, draws: int,
                   tune: int, chains: int, seed: int, target_accept: float,
                   chain_method: str, dense_mass: bool, progress: bool = False,
                   warmup_tree_depth: int = 10) -> tuple[Any, float]:
    """NUTS by NumPyro on the exported log density; returns the InferenceData and the
    sampling seconds (NumPyro's tracing, the compile or cache load of its program, the
    draws, and the map back to the constrained space). Of these, the seconds JAX spent
    preparing programs (tracing, lowering, compiling or loading from the persistent
    cache) are the posterior attribute ``sampler_program_seconds``
    (:class:`_ProgramClock`); the rest ran the chains and the map.

    ``x0``: (chains, n) start points in the unconstrained space
    (:meth:`ExportedModel.to_unconstrained` of the start values). ``warmup_tree_depth``:
    the deepest tree during the warm-up (the kept draws go to depth 10;
    :data:`inversion.bayes.settings.WARMUP_TREE_DEPTH_RANGE`).
    """
    import arviz as az
    import jax
    import jax.numpy as jnp
    import numpyro
    from numpyro.infer import MCMC, NUTS

    t = time.perf_counter()
    x0 = np.asarray(x0, float)
    kernel = NUTS(potential_fn=em.potential(), target_accept_prob=target_accept,
                  adapt_step_size=True, adapt_mass_matrix=True, dense_mass=dense_mass,
                  max_tree_depth=(int(warmup_tree_depth), 10))
    mcmc = MCMC(kernel, num_warmup=tune, num_samples=draws, num_chains=chains,
                postprocess_fn=None, chain_method=chain_method, progress_bar=progress)
    key = jax.random.PRNGKey(seed)
    if chains > 1:
        key = jax.random.split(key, chains)
    with _ProgramClock() as clock:
        mcmc.run(key, init_params=jnp.asarray(x0 if chains > 1 else x0[0]),
                 extra_fields=("num_steps", "potential_energy", "energy",
                               "adapt_state.step_size", "accept_prob", "diverging"))
        raw = np.asarray(mcmc.get_samples(group_by_chain=True)).reshape(chains, draws, -1)
        stats = _stats(mcmc)
        flat = jnp.asarray(raw.reshape(chains * draws, -1))
        outs = jax.jit(lambda X: jax.lax.map(em.constrain.call, X))(flat)
        post = {name: np.asarray(o).reshape(chains, draws, *o.shape[1:])
                for name, o in zip(em.outputs, outs, strict=True)}
    seconds = time.perf_counter() - t
    meta = em.meta
    attrs = {"sampling_time": seconds, "tuning_steps": tune,
             # of the sampling time: NumPyro's program traced, lowered and compiled (or
             # loaded from JAX's persistent cache); the rest runs the chains
             "sampler_program_seconds": clock.seconds,
             "inference_library": "numpyro",
             "inference_library_version": numpyro.__version__,
             "exported_log_density": em.key}
    idata = az.from_dict(posterior=post, sample_stats=stats,
                         observed_data={k: _array(v)
                                        for k, v in meta["observed_data"].items()},
                         constant_data={k: _array(v)
                                        for k, v in meta["constant_data"].items()},
                         coords=meta["coords"], dims=meta["dims"], attrs=attrs,
                         posterior_attrs=attrs)
    return idata, seconds
