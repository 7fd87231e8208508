"""The exported log density on disk (inversion.bayes.warm): equal to PyMC's own compiled
log density and gradient, the same draws from a cold and a warm cache, damaged or stale
entries rebuilt and never used, a key that follows the data and the priors.

Tiny sampler settings (2 chains x 20 + 20 draws of the four-block demo planet): these
tests check the mechanics, not a posterior.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

import components
from inversion import bayes
from inversion.bayes import warm
from inversion.case import load_case
from inversion.model import compile_problem, forward
from tests.conftest import EARTH_EXCLUDE, write_case, write_target

REPO = Path(__file__).resolve().parents[2]
DEMO = REPO / "case_studies" / "demo" / "orrin.toml"
SETTINGS = bayes.SamplerSettings(draws=20, tune=20, chains=2, seed=11)


@pytest.fixture(scope="module")
def demo():
    """The demo planet: four blocks, a late veneer, 27 sampled log10 D, end-member
    variances and an isotope system (every branch of the model)."""
    p = compile_problem(load_case(DEMO))
    return p, bayes.default_priors(p)


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """McDonough & Sun (1995) bulk silicate Earth against CI: a model quick to export."""
    folder = tmp_path_factory.mktemp("small")
    bse = components.load("BSE_MS95")
    rel = (bse.uncertainty / bse.composition).fillna(0.15)
    write_target(folder / "target.csv", bse.composition, rel)
    case = write_case(folder, candidates=["CI"], exclude=EARTH_EXCLUDE, title="BSE vs CI")
    p = compile_problem(load_case(case))
    return p, bayes.default_priors(p), case


@pytest.fixture(scope="module")
def cache(tmp_path_factory):
    """An empty export cache for this module (``PLANETMIX_EXPORT_CACHE``)."""
    folder = tmp_path_factory.mktemp("exported")
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("PLANETMIX_EXPORT_CACHE", str(folder))
        yield folder


@pytest.fixture(scope="module")
def cold(demo, cache):
    """A run of the default engine on an empty cache (exports the log density)."""
    p, priors = demo
    assert not any(cache.iterdir())
    return bayes.sample(p, SETTINGS, priors=priors, posterior_predictive=False,
                        log_likelihood=False)


def _points(em, model, rng, n=6):
    """Random unconstrained points near PyMC's initial point, as dicts and flat vectors."""
    ip = model.initial_point()
    names, shapes = em.meta["values"], em.meta["value_shapes"]
    off = np.cumsum([0, *em.meta["value_sizes"]])
    x0 = np.concatenate([np.ravel(ip[v]) for v in names])
    out = []
    for _ in range(n):
        x = x0 + rng.normal(0.0, 0.5, x0.size)
        out.append((x, {v: x[off[j]:off[j + 1]].reshape(shapes[j])
                        for j, v in enumerate(names)}))
    return out


def test_exported_log_density_and_gradient_equal_pytensor(demo, cold):
    """The deserialised log density and gradient (read back from disk) equal PyMC's own
    pytensor-compiled logp and dlogp of the same model at random unconstrained points, to
    1e-12 relative (measured: <= 3e-15); NumPyro's potential built on them, batched as
    vectorised chains batch it and differentiated, is exactly minus them."""
    import jax

    p, priors = demo
    em = warm.load_or_build(p, priors)  # the entry the cold run wrote
    assert em.origin == "loaded"
    model = bayes.build_model(p, priors)
    assert em.meta["values"] == [v.name for v in model.value_vars]
    logp = model.compile_logp(mode="FAST_COMPILE")
    dlogp = model.compile_dlogp(mode="FAST_COMPILE")
    vg = jax.jit(em.logp_grad.call)
    pot = jax.jit(jax.vmap(jax.value_and_grad(em.potential())))
    finite = 0
    for x, point in _points(em, model, np.random.default_rng(4)):
        ref, gref = float(logp(point)), np.asarray(dlogp(point))
        v, g = vg(x)
        pv, pg = pot(np.stack([x, x]))  # vectorised chains: batched, differentiated
        if not np.isfinite(ref):  # outside the core-iron support: both -inf
            assert float(v) == -np.inf
            continue
        finite += 1
        assert float(v) == pytest.approx(ref, rel=1e-12, abs=0)
        np.testing.assert_allclose(np.asarray(g), gref, rtol=1e-12,
                                   atol=1e-12 * np.max(np.abs(gref)))
        np.testing.assert_array_equal(np.asarray(pv), -float(v))
        np.testing.assert_array_equal(np.asarray(pg), -np.stack([g, g]))
    assert finite >= 4


def test_posterior_is_constrained_with_the_model_names(demo, cold):
    """The exported path's InferenceData carries the PyMC model's free parameters and
    deterministics under their names and dims, PyMC's sample_stats names and the observed
    data; its deterministic ``mu`` is the numpy forward model at the posterior draws."""
    p, priors = demo
    model = bayes.build_model(p, priors)
    post = cold.idata.posterior
    expected = {rv.name for rv in model.free_RVs} | {d.name for d in model.deterministics}
    assert set(post.data_vars) == expected
    for name in expected:
        dims = model.named_vars_to_dims.get(name, ())
        assert post[name].dims == ("chain", "draw", *dims), name
    assert post.sizes["chain"] == 2 and post.sizes["draw"] == 20
    assert {"diverging", "lp", "step_size", "n_steps", "tree_depth", "acceptance_rate",
            "energy"} <= set(cold.idata.sample_stats.data_vars)
    np.testing.assert_array_equal(cold.idata.observed_data["y_obs"].values, p.y)
    w = post["w"].values.reshape(-1, len(p.components))
    np.testing.assert_allclose(w.sum(axis=1), 1.0, rtol=1e-12)
    d = bayes.posterior_arrays(p, cold.idata)
    mu = forward(p, d["w"], d["vol"], d["lam"], D=d["D"])["log10N"][:, p.fit_index]
    np.testing.assert_allclose(post["mu"].values.reshape(mu.shape), mu, rtol=1e-9,
                               atol=1e-12)
    assert cold.timing["log_density_cached"] == 0.0


def test_same_seed_same_draws_cold_and_warm(demo, cache, cold):
    """The warm run, in a fresh process, loads the exported log density (does not import
    PyMC, so builds no PyMC graph) and gives the cold run's draws exactly."""
    code = f"""
import json, sys
import numpy as np
from inversion import bayes
from inversion.case import load_case
from inversion.model import compile_problem
p = compile_problem(load_case({str(DEMO)!r}))
r = bayes.sample(p, bayes.SamplerSettings(draws=20, tune=20, chains=2, seed=11),
                 posterior_predictive=False, log_likelihood=False)
np.savez(sys.argv[1], **{{k: v.values for k, v in r.idata.posterior.items()}},
         lp=r.idata.sample_stats["lp"].values)
print("RESULT " + json.dumps({{"cached": r.timing["log_density_cached"],
                              "pymc": "pymc" in sys.modules,
                              "pytensor": "pytensor" in sys.modules}}))
"""
    out = cache.parent / "warm_draws.npz"
    env = {**os.environ, "PLANETMIX_EXPORT_CACHE": str(cache)}
    r = subprocess.run([sys.executable, "-c", code, str(out)], capture_output=True,
                       text=True, env=env, cwd=REPO, timeout=600)
    line = [x for x in r.stdout.splitlines() if x.startswith("RESULT ")]
    assert line, r.stderr[-3000:]
    info = json.loads(line[0][7:])
    assert info == {"cached": 1.0, "pymc": False, "pytensor": False}
    warm_draws = np.load(out)
    post = cold.idata.posterior
    assert set(warm_draws.files) == set(post.data_vars) | {"lp"}
    for name in post.data_vars:
        np.testing.assert_array_equal(warm_draws[name], post[name].values, err_msg=name)
    np.testing.assert_array_equal(warm_draws["lp"], cold.idata.sample_stats["lp"].values)


def test_chain_method_recorded_is_the_one_that_ran(small, cache, tmp_path):
    """A process that started JAX itself (one CPU device) before planetmix: parallel
    chains cannot run, the chains run one after the other, and the result's settings say
    "sequential" (the draws of the two methods differ in the last digits, so the record
    must name the method that made them); this process (jax_setup's devices) keeps
    "parallel"."""
    p, priors, case = small
    code = f"""
import json, sys
import jax
jax.config.update("jax_enable_x64", True)
jax.numpy.zeros(1).block_until_ready()  # JAX started with its defaults: one CPU device
from inversion import bayes
from inversion.case import load_case
from inversion.model import compile_problem
p = compile_problem(load_case({str(case)!r}))
r = bayes.sample(p, bayes.SamplerSettings(draws=5, tune=5, chains=2, seed=3),
                 posterior_predictive=False, log_likelihood=False)
print("RESULT " + json.dumps({{"devices": jax.local_device_count(),
                              "method": r.settings.chain_method}}))
"""
    # without the parent's XLA_FLAGS (importing pymc.sampling.jax adds a forced device
    # count to them), so that the child's JAX starts with its own default
    env = {k: v for k, v in os.environ.items() if k != "XLA_FLAGS"}
    env["PLANETMIX_EXPORT_CACHE"] = str(cache)
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       env=env, cwd=REPO, timeout=600)
    line = [x for x in r.stdout.splitlines() if x.startswith("RESULT ")]
    assert line, r.stderr[-3000:]
    assert json.loads(line[0][7:]) == {"devices": 1, "method": "sequential"}
    here = bayes.sample(p, replace(SETTINGS, draws=5, tune=5), priors=priors,
                        posterior_predictive=False, log_likelihood=False)
    assert here.settings.chain_method == "parallel"


def test_damaged_or_stale_entries_are_rebuilt_never_used(small, tmp_path):
    """A truncated function file, an entry recorded under another key and an unreadable
    record are each ignored and written again; the rebuilt entry then loads."""
    import jax

    p, priors, _ = small
    first = warm.load_or_build(p, priors, cache=tmp_path)
    assert first.origin == "built"
    key = first.key
    entry = tmp_path / key
    x = np.zeros(first.size)
    ref = float(jax.jit(first.logp_grad.call)(x)[0])
    assert warm.load_or_build(p, priors, cache=tmp_path).origin == "loaded"

    # truncated file
    blob = (entry / "logp_grad.bin").read_bytes()
    (entry / "logp_grad.bin").write_bytes(blob[: len(blob) // 2])
    again = warm.load_or_build(p, priors, cache=tmp_path)
    assert again.origin == "built"
    # written again whole (the bytes differ from the first export only in the debug
    # locations of pytensor's generated source files)
    rewritten = (entry / "logp_grad.bin").read_bytes()
    assert len(rewritten) > len(blob) // 2
    assert json.loads((entry / "meta.json").read_text())["digests"]["logp_grad.bin"] == (
        hashlib.sha256(rewritten).hexdigest())
    assert float(jax.jit(again.logp_grad.call)(x)[0]) == ref

    # an entry of another model (other data) placed under this model's key
    y2 = p.y + 0.01
    other = warm.load_or_build(p, priors, y2, cache=tmp_path)
    assert other.key != key
    shutil.rmtree(entry)
    shutil.copytree(tmp_path / other.key, entry)
    assert json.loads((entry / "meta.json").read_text())["key"] == other.key
    stale = warm.load_or_build(p, priors, cache=tmp_path)
    assert stale.origin == "built"
    assert json.loads((entry / "meta.json").read_text())["key"] == key
    assert float(jax.jit(stale.logp_grad.call)(x)[0]) == ref
    assert float(jax.jit(other.logp_grad.call)(x)[0]) != ref

    # an unreadable record
    (entry / "meta.json").write_text("{not json", encoding="utf-8")
    assert warm.load_or_build(p, priors, cache=tmp_path).origin == "built"
    assert warm.load_or_build(p, priors, cache=tmp_path).origin == "loaded"


def test_key_follows_the_data_and_the_priors(small):
    """Same case compiled twice: same key; other observations (given, or in the
    problem), another uncertainty, another prior, another block's composition: other
    keys, all different."""
    p, priors, case = small
    k = warm.model_key(p, priors)
    assert len(k) == 64 and int(k, 16) >= 0
    p2 = compile_problem(load_case(case))
    assert warm.model_key(p2, bayes.default_priors(p2)) == k
    y = p.y.copy()
    y[0] += 1e-9
    keys = {
        "y": warm.model_key(p, priors, y),
        "problem_y": warm.model_key(replace(p, y=y), priors),
        "sigma": warm.model_key(replace(p, sigma=p.sigma * 1.01), priors),
        "prior": warm.model_key(p, {**priors, "tau": {"dist": "HalfNormal",
                                                       "sigma": 0.06}}),
        "Q": warm.model_key(replace(p, Q=p.Q * (1 + 1e-12)), priors),
    }
    assert k not in keys.values()
    assert len(set(keys.values())) == len(keys)


def test_program_clock_counts_nested_spans_once():
    """The union of JAX's trace/lower/compile spans, checked against a hand computation:
    spans [0, 2] and [1, 3] (an inner trace inside an outer one, overlapping) and [5, 6]
    cover 3 + 1 = 4 s; an event of another kind ([10, 20], a dispatch) is not counted."""
    events = warm._PROGRAM_EVENTS
    with warm._ProgramClock() as clock:
        warm._on_span(events[0], 0.0, 2.0)
        warm._on_span(events[1], 1.0, 3.0)
        warm._on_span(events[2], 5.0, 6.0)
        warm._on_span("/jax/core/pjit/dispatch", 10.0, 20.0)
        warm._on_span(events[0], 5.5, 5.8)  # nested inside [5, 6]
    assert clock.seconds == pytest.approx(4.0, abs=1e-12)


def test_sampler_program_time_is_a_part_of_the_sampling_time(cold):
    """The cold run compiles NumPyro's program: the seconds JAX spent preparing it are
    positive, at most the sampling time, and the chains' seconds are the rest; against
    an independent clock (perf_counter around ``jax.jit(...).lower().compile()`` of a
    function traced anew, compiled or loaded from the cache: both are preparation) the
    clock counts most of that time and never more."""
    import time

    import jax
    import jax.numpy as jnp

    t = cold.timing
    assert 0.0 < t["sampler_program_seconds"] <= t["sampling_seconds"]
    assert t["chains_seconds"] == pytest.approx(
        t["sampling_seconds"] - t["sampler_program_seconds"], rel=1e-12)
    def fresh(x):
        return jnp.sin(x).sum() + jnp.cumsum(x).max()

    with warm._ProgramClock() as clock:
        t0 = time.perf_counter()
        jax.jit(fresh).lower(jnp.ones(7)).compile()
        wall = time.perf_counter() - t0
    # most of a fresh function's lower-and-compile is the preparation the clock counts
    assert 0.5 * wall <= clock.seconds <= wall * 1.001 + 1e-4
