"""Benchmark of the model that the sampler runs: compile, sampling speed, forward speed.

Prints, for the four-block demo planet (case_studies/demo/orrin.toml):

- the first compile of the log density and its gradient with empty caches (cold) and
  again with the caches the first one filled (warm) (nutpie engine), and the compile
  seconds inside the sampling run (any engine);
- NUTS sampling of 4 chains x 1000 draws (1000 tuning): seconds, the smallest bulk ESS
  of the free parameters, ESS per second, divergences;
- batched forward evaluations per second (numpy, 4096 parameter sets).

Run from the repository (any tree: the script uses the ``inversion`` package found on
``sys.path``, so ``PYTHONPATH=/other/tree python benchmarks/bench_model.py`` measures
another implementation under the same conditions)::

    .venv/bin/python benchmarks/bench_model.py [--draws 1000] [--json FILE]

``benchmarks/compare_model.py`` runs this script on two trees in turn and prints ratios.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CASE = ROOT / "case_studies" / "demo" / "orrin.toml"


def _child(stage: str, draws: int, cache: str, engine: str) -> dict:
    env = {**os.environ, "PLANETMIX_JAX_CACHE": cache, "NUMBA_CACHE_DIR": cache,
           "PYTENSOR_FLAGS": f"compiledir={cache}/pytensor"}
    code = f"""
import json, sys, time
import numpy as np
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
if {stage!r} == "sample":
    res = bayes.sample(p, bayes.SamplerSettings(draws={draws}, tune={draws}, chains=4,
                                                 seed=1, engine={engine!r}),
                       posterior_predictive=False,
                       log_likelihood=False)
    import arviz as az
    names = bayes.parameter_names(bayes.build_model(p))
    ess = az.ess(res.idata, var_names=names)
    emin = min(float(ess[n].values.min()) for n in names)
    out.update(sample_compile_seconds=res.timing["compile_seconds"],
               sampling_seconds=res.timing["sampling_seconds"], ess_bulk_min=emin,
               ess_per_second=emin / res.timing["sampling_seconds"],
               divergences=res.diagnostics.divergences)
    rng = np.random.default_rng(0)
    B = 4096
    w = rng.dirichlet(np.ones(len(p.components)), B)
    vol = np.column_stack([rng.uniform(1100, 1500, B), rng.uniform(0.001, 0.004, B)])
    forward(p, w, vol, 0.003)
    t = time.perf_counter()
    for _ in range(5):
        forward(p, w, vol, 0.003)
    out["forward_per_second"] = 5 * B / (time.perf_counter() - t)
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
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as cache:
        cold = _child("compile", args.draws, cache, args.engine)
        warm = _child("sample", args.draws, cache, args.engine)
    res = {"engine": args.engine, "cold_compile_seconds": cold.get("compile_seconds"),
           "cold_build_seconds": cold["build_seconds"],
           "warm_compile_seconds": warm.get("compile_seconds"), **{
               k: warm[k] for k in ("sample_compile_seconds", "sampling_seconds",
                                    "ess_bulk_min", "ess_per_second", "divergences",
                                    "forward_per_second", "implementation")}}
    for k, v in res.items():
        print(f"{k:>24}: {v:.4g}" if isinstance(v, float) else f"{k:>24}: {v}")
    if args.json:
        args.json.write_text(json.dumps(res, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
