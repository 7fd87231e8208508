"""Simulation-based calibration (Talts et al. 2018, arXiv:1804.06788), larger run.

A synthetic body of two building blocks (CI + EH), kinked volatility, a CI late veneer
and a core at 8 wt% mantle FeO; every replicate draws all parameters from the prior,
simulates data from the numpy forward model with the Student-t likelihood and samples the
posterior as ``planetmix sample`` does. Prints, per parameter, the chi-square p-value of
the rank histogram against uniform and the coverage of the central 90% interval, and
writes the ranks to ``sbc_ranks.csv``.

Run: ``.venv/bin/python benchmarks/sbc.py [--replicates 100] [--out sbc_ranks.csv]``
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import stats

import components
from inversion import bayes
from inversion.case import load_case
from inversion.model import compile_problem

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from tests.inversion.test_bayes import ELEMENTS, write_case  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--replicates", type=int, default=100)
    ap.add_argument("--draws", type=int, default=500)
    ap.add_argument("--tune", type=int, default=500)
    ap.add_argument("--bins", type=int, default=10)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", default="sbc_ranks.csv")
    ap.add_argument("--engine", default="nutpie", choices=["nutpie", "numpyro", "pymc"])
    ap.add_argument("--cores", type=int, default=2, help="threads for the chains (nutpie)")
    args = ap.parse_args()
    bse = components.load("BSE_MS95").composition
    with tempfile.TemporaryDirectory() as tmp:
        p = compile_problem(load_case(write_case(Path(tmp), bse[ELEMENTS],
                                                 candidates=["CI", "EH"])))
    L = 99
    t0 = time.perf_counter()
    res = bayes.sbc(p, args.replicates, draws=args.draws, tune=args.tune, chains=2,
                    seed=args.seed, thin_to=L, progress=True, engine=args.engine,
                    cores=args.cores)
    res.to_csv(args.out, index=False)
    print(f"{args.replicates} replicates ({args.engine}, 2 chains x {args.draws} draws), "
          f"{L} thinned draws each, {time.perf_counter() - t0:.0f} s; ranks in {args.out}")
    print(f"{'parameter':<16} {'chi2 p':>8} {'cover90':>8}")
    for name, g in res.groupby("parameter", sort=False):
        counts = np.histogram(g["rank"], bins=args.bins, range=(0, L + 1))[0]
        print(f"{name:<16} {stats.chisquare(counts).pvalue:8.3f} "
              f"{g['covered90'].mean():8.2f}")
    pvals = [stats.chisquare(np.histogram(g["rank"], bins=args.bins, range=(0, L + 1))[0]
                             ).pvalue for _, g in res.groupby("parameter", sort=False)]
    print(f"smallest per-parameter p {min(pvals):.3f} against the Bonferroni threshold "
          f"0.05 / {len(pvals)} = {0.05 / len(pvals):.4f}: "
          f"{'uniform' if min(pvals) > 0.05 / len(pvals) else 'NOT uniform'}")
    counts = np.histogram(res["rank"], bins=args.bins, range=(0, L + 1))[0]
    print(f"{'all (pooled)':<16} {stats.chisquare(counts).pvalue:8.3f} "
          f"{res['covered90'].mean():8.2f}; divergent replicates: "
          f"{int((res.groupby('replicate')['divergences'].first() > 0).sum())}")


if __name__ == "__main__":
    main()
