"""Calibration of the class-independence test (issue 11 checks), and the BSE reading.

Two set-ups of the simulated bodies (``synthetic_body`` in tests/inversion/test_findings.py;
isotope observations are always those of the true mixture):

- ``exact``: bodies made from the library's mean building blocks and fitted with the blocks
  known exactly (no end-member variance in chi2);
- ``scattered``: each body's blocks drawn from their stated end-member uncertainty and
  fitted with that uncertainty in the variance (as ``planetmix fit`` fits a real body).

For each: 50 one-trend bodies demo-like and 50 Earth-like (15% noise), D scattered by
0.3 dex (false-positive rate at the stated 3-sigma threshold), and 30 Earth-like bodies
with a 0.3 dex per 1000 K class difference (detection rate, recovered difference, coverage
of the stated uncertainty). Then the class test on the bulk silicate Earth of McDonough &
Sun (1995), the Earth case as it stands.

    .venv/bin/python benchmarks/class_test_calibration.py [exact] [scattered] [bse] [power100]

(``power100``: 100 more power bodies with exact blocks, a tighter estimate of the rate.)
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from inversion import compile_problem, fit_problem, load_case  # noqa: E402
from inversion.findings import CLASS_TEST_SIGMA, class_test  # noqa: E402
from tests.inversion.test_findings import (  # noqa: E402
    EARTH,
    demo_problem,
    earth_problem,
    run_class_test,
    synthetic_body,
)

SIG15 = float(np.log10(1.15))
TRUE_OFFSET = 0.3  # dex per 1000 K


def null_run(kind: str, blocks: str, t: float) -> None:
    """50 one-trend bodies with D scattered by 0.3 dex."""
    rng = np.random.default_rng(2026 if kind == "demo" else 2027)
    p, w, vol, sig = ((demo_problem(), [0.55, 0.45], (1300.0, 0.003), None)
                      if kind == "demo" else
                      (earth_problem(), [0.5, 0.5], (1380.0, 0.0022), SIG15))
    cs = [run_class_test(synthetic_body(p, w, vol, rng, d_scatter_dex=0.3, sigma_dex=sig,
                                        blocks=blocks)) for _ in range(50)]
    s = np.array([c["significance_sigma"] for c in cs])
    d = np.array([c["slope_difference_dex_per_1000K"] for c in cs])
    print(f"[{blocks}] null {kind}-like, 50 bodies, D scattered 0.3 dex: FPR at "
          f"{CLASS_TEST_SIGMA:.0f} sigma {np.mean(s >= CLASS_TEST_SIGMA):.2f}; at 2 sigma "
          f"{np.mean(s >= 2):.2f}; median sigma {np.median(s):.2f}; median difference "
          f"{np.median(d):+.3f} dex/1000K  ({time.time() - t:.0f} s)", flush=True)


def power_run(blocks: str, t: float, n: int = 30, seed: int = 2028) -> None:
    """``n`` Earth-like bodies with a 0.3 dex per 1000 K class difference."""
    rng = np.random.default_rng(seed)
    p = earth_problem()
    cs = [run_class_test(synthetic_body(p, [0.5, 0.5], (1380.0, 0.0022), rng,
                                        offset=TRUE_OFFSET / 1000, sigma_dex=SIG15,
                                        blocks=blocks)) for _ in range(n)]
    d = np.array([c["slope_difference_dex_per_1000K"] for c in cs])
    u = np.array([c["uncertainty"] for c in cs])
    det = np.mean([c["differ"] for c in cs])
    print(f"[{blocks}] power Earth-like, {n} bodies (seed {seed}), true "
          f"+{TRUE_OFFSET:.2f} dex/1000K: "
          f"detected {det:.2f}; median recovered {np.median(d):+.3f} (mean {np.mean(d):+.3f},"
          f" sd {np.std(d, ddof=1):.3f}); median stated 1-sigma {np.median(u):.3f}; within "
          f"1 sigma {np.mean(abs(d - TRUE_OFFSET) <= u):.2f}; within 1.96 sigma "
          f"{np.mean(abs(d - TRUE_OFFSET) <= 1.96 * u):.2f}  ({time.time() - t:.0f} s)",
          flush=True)


def bse_run(t: float) -> None:
    """The class test on the Earth case (McDonough & Sun 1995 BSE)."""
    pb = compile_problem(load_case(EARTH))
    r = fit_problem(pb)
    c = class_test(pb, r)
    print("BSE McDonough & Sun (1995), Earth case:", c["statement"],
          f"LR {c['lr_statistic']:.2f}, p {c['p_value']:.3g}, chi2 {c['chi2_common']:.2f} -> "
          f"{c['chi2_split']:.2f}, blocks {c['split_components']}, common slope "
          f"{c['common_slope_dex_per_1000K']:.2f} dex/1000K, depleted {c['n_depleted']}  "
          f"({time.time() - t:.0f} s)", flush=True)


def main(argv: list[str]) -> None:
    t = time.time()
    parts = argv or ["exact", "scattered", "bse"]
    for blocks in ("exact", "scattered"):
        if blocks in parts:
            for kind in ("demo", "earth"):
                null_run(kind, blocks, t)
            power_run(blocks, t)
    if "power100" in parts:
        power_run("exact", t, n=100, seed=2029)
    if "bse" in parts:
        bse_run(t)


if __name__ == "__main__":
    main(sys.argv[1:])
