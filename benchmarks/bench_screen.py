"""Screening speed and quality: the convex screen against a brute-force grid and a global search.

Target: the McDonough & Sun (1995) bulk silicate Earth (10% uncertainties). Candidates:
the eleven library chondrites (CI and the ten groups). Hypotheses: every mixture of up to
three (231) and of up to four (561), each with its volatility parameters and a CI late
veneer, screened with ``screen(..., workers=2)``.

Baselines:

* the brute-force grid (the method of published Monte-Carlo mixing studies): a 1%-step
  simplex grid of the building-block weights x the volatility form's profile grid x
  eleven late-veneer fractions, best chi2 kept. It is timed on a sample of hypotheses of
  sizes 1-3 and extrapolated (said so in the output); size-4 grids (176,851 simplex
  points each) are extrapolated from the measured time per grid point;
* the independent global search of the tests (differential evolution over every
  parameter, then an SLSQP polish; ``tests/inversion/reference_search.py``) on a sample.

Run: ``.venv/bin/python benchmarks/bench_screen.py [--workers 2] [--sample 1] [--ref 6]``
Goals (issue 10): 561 hypotheses in < 5 s, >= 1000x the grid per hypothesis, engine chi2
<= grid chi2 and <= reference chi2 on every sampled hypothesis.
"""

from __future__ import annotations

import argparse
import itertools
import sys
import tempfile
import time
from collections import Counter
from dataclasses import replace
from math import comb
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import components  # noqa: E402
from inversion.case import load_case  # noqa: E402
from inversion.fit import _grid, screen  # noqa: E402
from inversion.model import compile_problem  # noqa: E402
from tests.conftest import EARTH_EXCLUDE, write_case, write_target  # noqa: E402
from tests.inversion.reference_search import evaluate, reference_fit  # noqa: E402

NAMES = ["CI", "CM", "CO", "CV", "CR", "CK", "H", "L", "LL", "EH", "EL"]
REL_TOL = 1e-3  # engine may exceed the reference by this relative amount (issue 10)


def _simplex(K: int, step: float) -> np.ndarray:
    ticks = np.round(np.arange(0, 1 + step / 2, step), 10)
    simplex = np.array([c for c in itertools.product(ticks, repeat=K - 1)
                        if sum(c) <= 1 + 1e-9]) if K > 1 else np.zeros((1, 0))
    return np.concatenate([simplex, 1 - simplex.sum(axis=1, keepdims=True)], axis=1)


def grid_points(K: int, form: str, step: float = 0.01, n_lam: int = 11) -> int:
    """Number of forward evaluations of the grid search for K blocks."""
    return comb(round(1 / step) + K - 1, K - 1) * len(_grid(form)) * n_lam


def grid_search(p, step: float = 0.01, n_lam: int = 11, chunk: int = 100_000) -> float:
    """Best feasible chi2 over a simplex grid x volatility grid x late-veneer grid."""
    W = _simplex(len(p.components), step)
    vols = _grid(p.volatility_form)
    lams = np.linspace(0, p.late_max_fraction, n_lam)
    best = np.inf
    combos = np.array(list(itertools.product(range(len(W)), range(len(vols)),
                                             range(len(lams)))))
    for s in range(0, len(combos), chunk):
        c = combos[s:s + chunk]
        chi2, g, _ = evaluate(p, W[c[:, 0]], lams[c[:, 2]], vols[c[:, 1]])
        ok = (g >= 0).all(axis=1) if g.size else np.ones(len(c), bool)
        if ok.any():
            best = min(best, float(np.nanmin(chi2[ok])))
    return best


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--sample", type=int, default=1, help="grid-searched hypotheses per size")
    ap.add_argument("--ref", type=int, default=6, help="hypotheses checked by global search")
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp())
    bse = components.load("BSE_MS95")
    write_target(tmp / "target.csv", bse.composition, 0.1)
    base = load_case(write_case(tmp, candidates=NAMES, exclude=EARTH_EXCLUDE))

    fits = {}
    t_screen = {}
    for size in (3, 4):
        t0 = time.perf_counter()
        ranking = screen(replace(base, max_mixture_size=size), workers=args.workers)
        t_screen[size] = time.perf_counter() - t0
        n = len(ranking.table)
        n_feas = sum(f.feasible for f in ranking.fits)
        statuses = Counter(f.status for f in ranking.fits)
        print(f"convex screen up to {size}: {n} hypotheses ({n_feas} feasible) in "
              f"{t_screen[size]:.2f} s ({args.workers} workers) -> {n / t_screen[size]:.0f}/s; "
              f"statuses {dict(sorted(statuses.items()))}")
        fits = {f.components: f for f in ranking.fits}
    n_all = len(fits)

    p = compile_problem(base)
    rng = np.random.default_rng(0)
    rows = []
    per_point = []
    for size in (1, 2, 3):
        subsets = list(itertools.combinations(NAMES, size))
        for i in rng.choice(len(subsets), args.sample, replace=False):
            names = subsets[i]
            sub = p.subset(names)
            t = time.perf_counter()
            chi_grid = grid_search(sub)
            dt = time.perf_counter() - t
            per_point.append(dt / grid_points(size, sub.volatility_form))
            rows.append(("+".join(names), fits[tuple(names)].chi2, chi_grid, dt))
    t_pt = float(np.median(per_point))
    form = p.volatility_form
    t_grid = {size: sum(comb(len(NAMES), K) * grid_points(K, form) * t_pt
                        for K in range(1, size + 1)) for size in (3, 4)}
    print(f"\ngrid search (1% simplex x {len(_grid(form))} volatility points x 11 late "
          f"fractions): {t_pt * 1e6:.2f} us per point measured on {len(rows)} sampled "
          f"hypotheses (sizes 1-3), extrapolated to all {n_all}: {t_grid[4]:.0f} s "
          f"({t_grid[4] / 3600:.1f} h, single process)")
    print("hypothesis            chi2 convex   chi2 grid   t grid [s]")
    for name, a, b, tb in rows:
        print(f"{name:<20} {a:12.3f} {b:11.3f} {tb:11.2f}")
    for size in (3, 4):
        n = sum(comb(len(NAMES), K) for K in range(1, size + 1))
        per_hyp_engine = t_screen[size] / n
        per_hyp_grid = t_grid[size] / n
        print(f"up to {size} ({n} hypotheses): screen {t_screen[size]:.2f} s, "
              f"{per_hyp_engine * 1e3:.1f} ms per hypothesis ({args.workers} workers), grid "
              f"{per_hyp_grid:.1f} s per hypothesis (1 process) -> "
              f"{per_hyp_grid / per_hyp_engine:.0f}x "
              f"({per_hyp_grid / per_hyp_engine / args.workers:.0f}x per core)")
    worse = [r for r in rows if not r[1] <= r[2] + 1e-6]
    print(f"convex chi2 <= grid chi2 on {len(rows) - len(worse)} of {len(rows)} sampled "
          "hypotheses" + (f"; worse on: {[r[0] for r in worse]}" if worse else ""))

    keys = list(fits)
    pick = [keys[i] for i in rng.choice(len(keys), args.ref, replace=False)]
    print("\nglobal-search reference (DE + SLSQP polish) on a random sample:")
    print("hypothesis            chi2 convex   chi2 ref   rel. gap   t ref [s]")
    bad = []
    gaps: list[float] = []
    for names in pick:
        t = time.perf_counter()
        ref = reference_fit(p.subset(names), maxiter=200, popsize=20)
        dt = time.perf_counter() - t
        ours = fits[names].chi2
        gap = (ours - ref.chi2) / ref.chi2 if np.isfinite(ref.chi2) else float("nan")
        if np.isfinite(gap):
            gaps.append(gap)
        if not (ours <= ref.chi2 * (1 + REL_TOL) + 1e-6 or not np.isfinite(ref.chi2)):
            bad.append("+".join(names))
        print(f"{'+'.join(names):<20} {ours:12.3f} {ref.chi2:10.3f} {gap:10.2e} {dt:10.1f}")
    print(f"convex chi2 <= reference chi2 (1e-3 relative) on {len(pick) - len(bad)} of "
          f"{len(pick)} sampled hypotheses" + (f"; worse on: {bad}" if bad else ""))
    if gaps:
        print(f"worst relative chi2 gap (convex - reference) / reference: {max(gaps):.2e}")


if __name__ == "__main__":
    main()
