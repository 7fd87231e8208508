"""Screening speed: the convex screen against a brute-force simplex grid search.

Target: the McDonough & Sun (1995) bulk silicate Earth. Hypotheses: every mixture of up
to three of the eleven library chondrites (CI and the ten groups) = 231, each with its
volatility parameters profiled and a CI late veneer.

Baseline (the method of published Monte-Carlo mixing studies): for each hypothesis,
evaluate the forward model on a 1%-step simplex grid of the building-block weights, for
every point of the same volatility grid and eleven late-veneer fractions, keep the best
chi2. It is timed on a sample of hypotheses of each size and extrapolated to all 231
(said so in the output); the chi2 comparison is on the sampled hypotheses.

Run: ``.venv/bin/python benchmarks/bench_screen.py [--workers 2] [--sample 2]``
Goals: >= 100x faster than the grid at equal or lower chi2; the whole screen < 10 s.
"""

from __future__ import annotations

import argparse
import itertools
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import components  # noqa: E402
from inversion.case import load_case  # noqa: E402
from inversion.fit import SCREEN_SETTINGS, _grid, fit_problem, screen  # noqa: E402
from inversion.model import compile_problem, forward  # noqa: E402
from tests.conftest import EARTH_EXCLUDE, write_case, write_target  # noqa: E402

NAMES = ["CI", "CM", "CO", "CV", "CR", "CK", "H", "L", "LL", "EH", "EL"]


def grid_search(p, step: float = 0.01, n_lam: int = 11, chunk: int = 200_000) -> float:
    """Best chi2 over a simplex grid x volatility grid x late-veneer grid (vectorised)."""
    K = len(p.components)
    ticks = np.round(np.arange(0, 1 + step / 2, step), 10)
    simplex = np.array([c for c in itertools.product(ticks, repeat=K - 1)
                        if sum(c) <= 1 + 1e-9]) if K > 1 else np.zeros((1, 0))
    W = np.concatenate([simplex, 1 - simplex.sum(axis=1, keepdims=True)], axis=1)
    vols = _grid(p.volatility_form)
    lams = np.linspace(0, p.late_max_fraction, n_lam)
    fi = p.fit_index
    best = np.inf
    combos = np.array(list(itertools.product(range(len(W)), range(len(vols)),
                                             range(len(lams)))))
    for s in range(0, len(combos), chunk):
        c = combos[s:s + chunk]
        fwd = forward(p, W[c[:, 0]], vols[c[:, 1]], lams[c[:, 2]])
        chi2 = (((fwd["log10N"][:, fi] - p.y) / p.sigma) ** 2).sum(axis=1)
        best = min(best, float(np.nanmin(chi2)))
    return best


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--sample", type=int, default=2, help="grid-searched hypotheses per size")
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp())
    bse = components.load("BSE_MS95")
    write_target(tmp / "target.csv", bse.composition, 0.1)
    case = load_case(write_case(tmp, candidates=NAMES, exclude=EARTH_EXCLUDE))

    t0 = time.perf_counter()
    ranking = screen(case, workers=args.workers)
    t_screen = time.perf_counter() - t0
    n_hyp = len(ranking.table)
    print(f"convex screen: {n_hyp} hypotheses in {t_screen:.2f} s "
          f"({args.workers} workers) -> {n_hyp / t_screen:.1f} hypotheses/s")

    p = compile_problem(case)
    rng = np.random.default_rng(0)
    t_grid_per_size = {}
    rows = []
    for size in (1, 2, 3):
        subsets = list(itertools.combinations(NAMES, size))
        pick = [subsets[i] for i in rng.choice(len(subsets), args.sample, replace=False)]
        times = []
        for names in pick:
            sub = p.subset(names)
            t = time.perf_counter()
            chi_grid = grid_search(sub)
            times.append(time.perf_counter() - t)
            t = time.perf_counter()
            chi_ours = fit_problem(sub, SCREEN_SETTINGS).chi2
            t_ours = time.perf_counter() - t
            rows.append(("+".join(names), chi_ours, chi_grid, t_ours, times[-1]))
        t_grid_per_size[size] = (float(np.mean(times)), len(subsets))
    print("\nhypothesis            chi2 convex   chi2 grid   t convex [s]  t grid [s]")
    for name, a, b, ta, tb in rows:
        print(f"{name:<20} {a:12.3f} {b:11.3f} {ta:13.3f} {tb:11.2f}")
    t_grid = sum(t * n for t, n in t_grid_per_size.values())
    print(f"\ngrid search, extrapolated from {3 * args.sample} sampled hypotheses to {n_hyp}: "
          f"{t_grid:.0f} s (single process)")
    print(f"speed-up (grid, 1 process) / (convex screen, {args.workers} workers): "
          f"{t_grid / t_screen:.0f}x")
    per_fit = np.mean([r[3] for r in rows])
    per_grid = np.mean([r[4] for r in rows])
    print(f"speed-up per hypothesis, both single process: {per_grid / per_fit:.0f}x")
    worse = [r for r in rows if r[1] > r[2] + 1e-6]
    print(f"convex chi2 <= grid chi2 on {len(rows) - len(worse)} of {len(rows)} sampled "
          "hypotheses" + (f"; worse on: {[r[0] for r in worse]}" if worse else ""))


if __name__ == "__main__":
    main()
