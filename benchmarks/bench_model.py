"""Benchmark of the model that the sampler runs: compile, sampling speed, forward speed.

Prints, for the four-block demo planet (case_studies/demo/orrin.toml):

- the first compile of the log density and its gradient with empty caches (cold) and
  again with the caches the first one filled (warm): nutpie's compile, or for the
  engines that compile inside the run (NumPyro) the compile seconds of a run of 5 + 5
  draws; and the compile seconds inside the sampling run;
- NUTS sampling of 4 chains x 1000 draws (1000 tuning): seconds, the smallest bulk ESS
  of the free parameters, ESS per second, divergences; for the default engine also the
  seconds JAX spent preparing NumPyro's program inside the run (tracing, lowering, and
  compiling or loading it from the persistent cache: ``sampler_program_seconds``) and
  the rest, the chains themselves (``chains_seconds``, ``ess_per_chains_second``: the
  figure comparable with nutpie's sampling time, which excludes its compile), and the
  same run repeated in the same process (``again_*``: NumPyro's program loaded from
  JAX's persistent cache, as in a second run of a case);
- batched forward evaluations per second (numpy, 4096 parameter sets);
- the cost of one evaluation of the log density and its gradient (CPU microseconds, so
  that other work on the machine does not enter): inside one XLA loop (how NumPyro runs
  it) and per Python call (how nutpie calls it), and the same with the end-member
  variance of ``kernel.end_member_variance`` rewritten as two small products (an A/B in
  the same process, interleaved, with the ratio; measured no faster, so not adopted).

The compile of the log density and gradient alone, cold and warm, of the exported path
that the default engine runs and of the PyMC/pytensor path before it, in separate
processes: ``benchmarks/bench_compile.py``.

CPU seconds of the sampling run are printed beside the wall seconds: on a shared machine
ESS per CPU second is the figure that compares runs made under different loads.

Run from the repository (any tree: the script uses the ``inversion`` package found on
``sys.path``, so ``PYTHONPATH=/other/tree python benchmarks/bench_model.py`` measures
another implementation under the same conditions)::

    .venv/bin/python benchmarks/bench_model.py [--draws 1000] [--json FILE]
        [--engine numpyro --chain-method sequential|vectorized|parallel]

``benchmarks/compare_model.py`` runs this script on two trees in turn and prints ratios.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import textwrap
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CASE = ROOT / "case_studies" / "demo" / "orrin.toml"


GRADIENT_CODE = """
import jax, jax.numpy as jnp
from jax.flatten_util import ravel_pytree
from pymc.sampling.jax import get_jaxified_logp


def loop_us(vg, x0, N=2000):
    # N evaluations inside one compiled loop, CPU time of the process, best of 5
    def run(x):
        def body(i, carry):
            x, acc = carry
            v, g = vg(x)
            return x + 1e-12 * g, acc + v
        return jax.lax.fori_loop(0, N, body, (x, 0.0))
    f = jax.jit(run)
    jax.block_until_ready(f(x0))
    best = []
    for _ in range(5):
        t = time.process_time()
        jax.block_until_ready(f(x0))
        best.append(time.process_time() - t)
    return min(best) / N * 1e6


def call_us(vg, x0, N=2000):
    f = jax.jit(vg)
    jax.block_until_ready(f(x0))
    best = []
    for _ in range(5):
        t = time.process_time()
        for _ in range(N):
            r = f(x0)
            jax.block_until_ready(r)
        best.append(time.process_time() - t)
    return min(best) / N * 1e6


m = bayes.build_model(p)
logp = get_jaxified_logp(m, negative_logp=False)
ip = m.initial_point()
x0, unravel = ravel_pytree([jnp.asarray(ip[v.name], dtype=float) for v in m.value_vars])
vg = jax.value_and_grad(lambda x: logp(unravel(x)))
out["logp_grad_loop_us"] = loop_us(vg, x0)
out["logp_grad_call_us"] = call_us(vg, x0)
# the end-member variance in the whole log density: the broadcast form of
# kernel.end_member_variance (what jaxmodel.predictions uses) against the same formula
# as two small products, (w*w) @ (Q s)^2 / (w @ Q)^2, interleaved, best of each
import inspect
from inversion import jaxmodel
src = inspect.getsource(jaxmodel.predictions)
line = "em = (kernel.end_member_variance(jnp, Q_fit, S_fit, w) if has_em"
ns = dict(vars(jaxmodel))
exec(src.replace(line, "em = ((w * w) @ ((Q_fit * S_fit) ** 2) / (w @ Q_fit) ** 2 if has_em")
     .replace("def predictions(", "def predictions_products("), ns)
forms = {"broadcast": jaxmodel.predictions, "products": ns["predictions_products"]}
vgs = {}
for form, fn in forms.items():
    jaxmodel.predictions = fn
    m = bayes.build_model(p)
    lp = get_jaxified_logp(m, negative_logp=False)
    vgs[form] = jax.value_and_grad(lambda x, lp=lp: lp(unravel(x)))
jaxmodel.predictions = forms["broadcast"]
for rep in range(3):
    for form, g in vgs.items():
        out.setdefault("em_" + form + "_loop_us", []).append(loop_us(g, x0))
for form in forms:
    out["em_" + form + "_loop_us"] = min(out["em_" + form + "_loop_us"])
out["em_products_over_broadcast"] = (out["em_products_loop_us"]
                                     / out["em_broadcast_loop_us"])
"""


def _child(stage: str, draws: int, cache: str, engine: str, chain_method: str,
           gradient: bool = False, mass: str = "", depth: int = 0) -> dict:
    env = {**os.environ, "PLANETMIX_JAX_CACHE": cache, "NUMBA_CACHE_DIR": cache,
           "PYTENSOR_FLAGS": f"compiledir={cache}/pytensor"}
    pre = ""
    if chain_method == "parallel":  # one XLA CPU device per chain, before JAX starts
        pre = "import jax; jax.config.update('jax_num_cpu_devices', 4)"
    code = f"""
{pre}
import json, os, sys, time
import numpy as np
import dataclasses
try:  # trees before the sampler's split have no engines module
    import inversion.bayes.engines as engines
    engines.NUMPYRO_CHAIN_METHOD = {chain_method!r}  # trees before [sampler] chain_method
except ImportError:
    pass
from inversion.case import load_case
from inversion.model import compile_problem, forward
from inversion import bayes
p = compile_problem(load_case({str(CASE)!r}))
out = {{"implementation": bayes.__file__}}
t = time.perf_counter()
model = bayes.build_model(p)
out["build_seconds"] = time.perf_counter() - t
if {engine!r} == "nutpie":
    runner = bayes._NutpieModel.build(model)
    out["compile_seconds"] = runner.compile_seconds
else:  # the engine compiles the whole sampler inside the run: a run of 5 + 5 draws
    r = bayes.sample(p, bayes.SamplerSettings(draws=5, tune=5, chains=4, seed=1,
                                              engine={engine!r}),
                     posterior_predictive=False, log_likelihood=False)
    out["compile_seconds"] = r.timing["compile_seconds"]
if {stage!r} == "sample":
    cpu = time.process_time()
    st = bayes.SamplerSettings(draws={draws}, tune={draws}, chains=4, seed=1,
                               engine={engine!r})
    names_ = {{f.name for f in dataclasses.fields(st)}}
    if "chain_method" in names_:
        st = dataclasses.replace(st, chain_method={chain_method!r})
    if {mass!r} and "mass_matrix" in names_:
        st = dataclasses.replace(st, mass_matrix={mass!r})
    if {depth!r} and "warmup_tree_depth" in names_:
        st = dataclasses.replace(st, warmup_tree_depth={depth!r})
    res = bayes.sample(p, st, posterior_predictive=False, log_likelihood=False)
    stats = res.idata.sample_stats
    if "n_steps" in stats:  # leapfrog steps per kept draw
        out["leapfrogs_per_draw"] = float(stats["n_steps"].values.mean())
        out["leapfrogs_per_draw_median"] = float(np.median(stats["n_steps"].values))
    elif "tree_size" in stats:
        out["leapfrogs_per_draw"] = float(stats["tree_size"].values.mean())
    import arviz as az
    names = bayes.parameter_names(bayes.build_model(p))
    ess = az.ess(res.idata, var_names=names)
    emin = min(float(ess[n].values.min()) for n in names)
    out["sample_cpu_seconds"] = time.process_time() - cpu
    out.update(sample_compile_seconds=res.timing["compile_seconds"],
               sampling_seconds=res.timing["sampling_seconds"], ess_bulk_min=emin,
               ess_per_second=emin / res.timing["sampling_seconds"],
               divergences=res.diagnostics.divergences)
    if "chains_seconds" in res.timing:  # the chains alone, NumPyro's program apart
        out.update(sampler_program_seconds=res.timing["sampler_program_seconds"],
                   chains_seconds=res.timing["chains_seconds"],
                   ess_per_chains_second=emin / res.timing["chains_seconds"])
        # the same run again: NumPyro's program now comes from JAX's persistent cache, as
        # in a user's second run of a case (same seed, same draws, same ESS)
        again = bayes.sample(p, st, posterior_predictive=False, log_likelihood=False).timing
        out.update(again_sampler_program_seconds=again["sampler_program_seconds"],
                   again_chains_seconds=again["chains_seconds"],
                   again_sampling_seconds=again["sampling_seconds"],
                   again_ess_per_second=emin / again["sampling_seconds"],
                   again_ess_per_chains_second=emin / again["chains_seconds"])
    rng = np.random.default_rng(0)
    B = 4096
    w = rng.dirichlet(np.ones(len(p.components)), B)
    vol = np.column_stack([rng.uniform(1100, 1500, B), rng.uniform(0.001, 0.004, B)])
    forward(p, w, vol, 0.003)
    t = time.perf_counter()
    for _ in range(5):
        forward(p, w, vol, 0.003)
    out["forward_per_second"] = 5 * B / (time.perf_counter() - t)
    out["load_average"] = os.getloadavg()[0]
    if {gradient!r}:
{textwrap.indent(GRADIENT_CODE, "        ")}
print("RESULT " + json.dumps(out))
"""
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       env=env, timeout=3000)
    for line in r.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise SystemExit(f"benchmark child failed:\n{r.stderr[-3000:]}")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--json", type=Path)
    ap.add_argument("--engine", default="nutpie", help="sampler engine (nutpie, numpyro)")
    ap.add_argument("--chain-method", default="parallel",
                    choices=("sequential", "vectorized", "parallel"),
                    help="NumPyro's way of running the chains (numpyro engine)")
    ap.add_argument("--mass-matrix", default="",
                    help="[sampler] mass_matrix of the sampling run (default: the settings' "
                         "default)")
    ap.add_argument("--warmup-tree-depth", type=int, default=0,
                    help="[sampler] warmup_tree_depth of the sampling run (numpyro; default: "
                         "the settings' default)")
    ap.add_argument("--no-gradient", action="store_true",
                    help="skip the per-evaluation cost of the log density and gradient")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as cache:
        cold = _child("compile", args.draws, cache, args.engine, args.chain_method)
        warm = _child("sample", args.draws, cache, args.engine, args.chain_method,
                      not args.no_gradient, args.mass_matrix, args.warmup_tree_depth)
    res = {"engine": args.engine, "chain_method": args.chain_method,
           "mass_matrix": args.mass_matrix or "default",
           "warmup_tree_depth": args.warmup_tree_depth or "default",
           "cold_compile_seconds": cold.get("compile_seconds"),
           "cold_build_seconds": cold["build_seconds"],
           "warm_compile_seconds": warm.get("compile_seconds"), **{
               k: warm[k] for k in ("sample_compile_seconds", "sampling_seconds",
                                    "sample_cpu_seconds", "ess_bulk_min", "ess_per_second",
                                    "sampler_program_seconds", "chains_seconds",
                                    "ess_per_chains_second", "again_sampler_program_seconds",
                                    "again_chains_seconds", "again_sampling_seconds",
                                    "again_ess_per_second", "again_ess_per_chains_second",
                                    "leapfrogs_per_draw", "leapfrogs_per_draw_median",
                                    "divergences", "forward_per_second", "load_average",
                                    "logp_grad_loop_us", "logp_grad_call_us",
                                    "em_broadcast_loop_us", "em_products_loop_us",
                                    "em_products_over_broadcast", "implementation")
               if k in warm}}
    for k, v in res.items():
        print(f"{k:>24}: {v:.4g}" if isinstance(v, float) else f"{k:>24}: {v}")
    if args.json:
        args.json.write_text(json.dumps(res, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
