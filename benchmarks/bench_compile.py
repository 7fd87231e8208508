"""Benchmark of the compile of a case's log density and gradient, cold and warm.

Each measurement runs in a fresh process, on the four-block demo planet
(case_studies/demo/orrin.toml), with temporary caches (XLA's persistent cache, the
exported log densities inside it, pytensor's compile folder) that start empty:

1. ``new`` cold: the exported log density (:mod:`inversion.bayes.warm`) built from the
   PyMC model, serialised, written, and its value and gradient compiled and evaluated
   once; then a run of the default engine (NumPyro, 4 chains x 5 + 5 draws);
2. ``old`` cold: the path before it: the PyMC model built, translated to JAX by pytensor
   (``get_jaxified_logp``), traced, compiled by XLA and evaluated once; then PyMC's
   NumPyro run (``pm.sample(nuts_sampler="numpyro")``, 4 chains x 5 + 5) as the default
   engine ran it;
3. then ``--repeats`` pairs of warm runs, interleaved ``new``, ``old``, each in a fresh
   process after the cold ones filled the caches.

Printed per process: ``logp_grad_seconds`` (from the compiled problem to the first
value and gradient: the figure of the issue's goal, < 1 s warm), ``run_*`` seconds of
the 5 + 5 draw run (its compile and sampling seconds as the engine reports them),
whether PyMC was imported, the process wall time (Python start, imports and all), and
the warm ratio old/new of the best runs. A warm ``new`` run whose exported entry was
not found (the key covers the package source: an edit between the runs) is counted as
cold and left out of the warm figures. The load average is printed before and after.

Run from the repository::

    .venv/bin/python benchmarks/bench_compile.py [--repeats 3] [--nutpie] [--json FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CASE = ROOT / "case_studies" / "demo" / "orrin.toml"

CHILD = """
import json, os, sys, time
t_start = time.perf_counter()
import numpy as np
from inversion import bayes
from inversion.case import load_case
from inversion.model import compile_problem
from inversion.jaxmodel import jax_setup
jax = jax_setup()
p = compile_problem(load_case({case!r}))
priors = bayes.default_priors(p)
out = {{"path": {path!r}, "imports_and_problem_seconds": time.perf_counter() - t_start}}
t = time.perf_counter()
if {path!r} == "new":
    from inversion.bayes import warm
    em = warm.load_or_build(p, priors)
    x0 = np.zeros(em.size)
    v, g = jax.jit(em.logp_grad.call)(x0)
    jax.block_until_ready(g)
    out["logp_grad_seconds"] = time.perf_counter() - t
    out["exported_cached"] = em.origin == "loaded"
    out["exported_seconds"] = em.seconds
    t = time.perf_counter()
    r = bayes.sample(p, bayes.SamplerSettings(draws=5, tune=5, chains=4, seed=1),
                     priors=priors, posterior_predictive=False, log_likelihood=False)
    out["run_seconds"] = time.perf_counter() - t
    out["run_compile_seconds"] = r.timing["compile_seconds"]
    out["run_sampling_seconds"] = r.timing["sampling_seconds"]
else:
    from jax.flatten_util import ravel_pytree
    from pymc.sampling.jax import get_jaxified_logp
    model = bayes.build_model(p, priors)
    out["build_model_seconds"] = time.perf_counter() - t
    logp = get_jaxified_logp(model, negative_logp=True)
    ip = model.initial_point()
    x0, unravel = ravel_pytree([np.asarray(ip[v.name], float) for v in model.value_vars])
    vg = jax.jit(jax.value_and_grad(lambda x: logp(unravel(x))))
    v, g = vg(x0)
    jax.block_until_ready(g)
    out["logp_grad_seconds"] = time.perf_counter() - t
    if {nutpie!r}:
        out["nutpie_compile_seconds"] = bayes._NutpieModel.build(
            bayes.build_model(p, priors)).compile_seconds
    # the default engine before the exported path: PyMC's NumPyro run
    import pymc as pm
    from inversion.fit import fit_problem
    inits = bayes.start_points(p, priors, fit_problem(p), 4, np.random.default_rng(0),
                               0.02)
    t = time.perf_counter()
    model = bayes.build_model(p, priors)
    with model:
        idata = pm.sample(draws=5, tune=5, chains=4, cores=1, random_seed=1,
                          initvals=inits, target_accept=0.9, progressbar=False,
                          compute_convergence_checks=False, nuts_sampler="numpyro",
                          nuts_sampler_kwargs={{"chain_method": "parallel"}})
    out["run_seconds"] = time.perf_counter() - t
    out["run_sampling_seconds"] = float(idata.posterior.attrs["sampling_time"])
    out["run_compile_seconds"] = out["run_seconds"] - out["run_sampling_seconds"]
out["pymc_imported"] = "pymc" in sys.modules
out["load_average"] = os.getloadavg()[0]
print("RESULT " + json.dumps(out))
"""


def _child(path: str, cache: str, nutpie: bool) -> dict:
    env = {**os.environ, "PLANETMIX_JAX_CACHE": cache, "NUMBA_CACHE_DIR": cache,
           "PYTENSOR_FLAGS": f"compiledir={cache}/pytensor"}
    env.pop("PLANETMIX_EXPORT_CACHE", None)  # the exported entries go inside the cache
    code = CHILD.format(case=str(CASE), path=path, nutpie=nutpie)
    t = time.perf_counter()
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       env=env, timeout=3000, cwd=ROOT)
    wall = time.perf_counter() - t
    for line in r.stdout.splitlines():
        if line.startswith("RESULT "):
            return {**json.loads(line[7:]), "process_wall_seconds": wall}
    raise SystemExit(f"benchmark child failed:\n{r.stderr[-3000:]}")


def _show(tag: str, r: dict) -> None:
    keys = ("logp_grad_seconds", "exported_cached", "exported_seconds", "build_model_seconds",
            "nutpie_compile_seconds", "run_compile_seconds", "run_sampling_seconds",
            "run_seconds", "imports_and_problem_seconds", "process_wall_seconds",
            "pymc_imported", "load_average")
    cells = [f"{k}={r[k]:.3f}" if isinstance(r[k], float) else f"{k}={r[k]}"
             for k in keys if k in r]
    print(f"{tag:>10} {r['path']:>3}: " + " ".join(cells), flush=True)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3, help="warm pairs (new, old)")
    ap.add_argument("--nutpie", action="store_true",
                    help="also time nutpie's compile (the old nutpie path) in the old runs")
    ap.add_argument("--json", type=Path)
    args = ap.parse_args(argv)
    print(f"load average before: {os.getloadavg()}", flush=True)
    runs: list[tuple[str, dict]] = []
    with tempfile.TemporaryDirectory() as cache:
        for path in ("new", "old"):
            r = _child(path, cache, args.nutpie)
            _show("cold", r)
            runs.append(("cold", r))
        for _ in range(args.repeats):
            for path in ("new", "old"):
                r = _child(path, cache, args.nutpie)
                _show("warm", r)
                runs.append(("warm", r))
    print(f"load average after: {os.getloadavg()}", flush=True)
    warm = {path: [r for tag, r in runs if tag == "warm" and r["path"] == path]
            for path in ("new", "old")}
    summary: dict = {"warm_new_runs": len(warm["new"])}
    # a warm ``new`` run that missed the exported entry (its key changed: the package
    # source was edited between the runs) is a cold run: left out of the warm figures
    warm["new"] = [r for r in warm["new"] if r["exported_cached"]]
    summary["warm_new_runs_cached"] = len(warm["new"])
    if not warm["new"]:
        raise SystemExit("no warm run found the exported entry (source edited meanwhile?)")
    for key in ("logp_grad_seconds", "run_seconds", "process_wall_seconds"):
        for path in ("new", "old"):
            vals = [r[key] for r in warm[path]]
            summary[f"warm_{path}_{key}_min"] = min(vals)
            summary[f"warm_{path}_{key}_median"] = statistics.median(vals)
        summary[f"warm_old_over_new_{key}"] = (summary[f"warm_old_{key}_min"]
                                               / summary[f"warm_new_{key}_min"])
    for _tag, r in runs[:2]:
        summary[f"cold_{r['path']}_logp_grad_seconds"] = r["logp_grad_seconds"]
    for k, v in summary.items():
        print(f"{k:>44}: {v:.4g}" if isinstance(v, float) else f"{k:>44}: {v}")
    if args.json:
        args.json.write_text(json.dumps({"runs": runs, "summary": summary}, indent=1),
                             encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
