"""Calibration of the class-independence test (issue 11 checks), and the BSE reading.

Runs 50 one-trend bodies demo-like and 50 Earth-like (D scattered by 0.3 dex), 30
Earth-like bodies with a 0.3 dex per 1000 K class difference, and the class test on the
bulk silicate Earth of McDonough & Sun (1995). Prints the false-positive rate at the
3-sigma threshold, the detection rate, the coverage of the stated uncertainty.

    .venv/bin/python benchmarks/class_test_calibration.py
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from inversion import compile_problem, fit_problem, load_case  # noqa: E402
from inversion.findings import class_test  # noqa: E402
from tests.inversion.test_findings import (  # noqa: E402
    EARTH,
    demo_problem,
    earth_problem,
    run_class_test,
    synthetic_body,
)


def main() -> None:
    t = time.time()
    sig15 = np.log10(1.15)
    for kind, seed in (("demo", 2026), ("earth", 2027)):
        rng = np.random.default_rng(seed)
        p, w, vol, sig = ((demo_problem(), [0.55, 0.45], (1300.0, 0.003), None)
                          if kind == "demo" else
                          (earth_problem(), [0.5, 0.5], (1380.0, 0.0022), sig15))
        cs = [run_class_test(synthetic_body(p, w, vol, rng, d_scatter_dex=0.3, sigma_dex=sig))
              for _ in range(50)]
        s = np.array([c["significance_sigma"] for c in cs])
        d = np.array([c["slope_difference_dex_per_1000K"] for c in cs])
        print(f"null {kind}-like, 50 bodies: FPR at 3 sigma {np.mean(s >= 3):.2f}; at 2 sigma "
              f"{np.mean(s >= 2):.2f}; median sigma {np.median(s):.2f}; median difference "
              f"{np.median(d):+.3f} dex/1000K  ({time.time() - t:.0f} s)", flush=True)
    rng = np.random.default_rng(2028)
    p = earth_problem()
    cs = [run_class_test(synthetic_body(p, [0.5, 0.5], (1380.0, 0.0022), rng, offset=0.0003,
                                        sigma_dex=sig15)) for _ in range(30)]
    d = np.array([c["slope_difference_dex_per_1000K"] for c in cs])
    u = np.array([c["uncertainty"] for c in cs])
    det = np.mean([c["differ"] for c in cs])
    print(f"power Earth-like, 30 bodies, true 0.30 dex/1000K: detected {det:.2f}; median "
          f"recovered {np.median(d):+.3f}; median stated 1-sigma {np.median(u):.3f}; "
          f"within 1 sigma {np.mean(abs(d - 0.3) <= u):.2f}; within 1.96 sigma "
          f"{np.mean(abs(d - 0.3) <= 1.96 * u):.2f}  ({time.time() - t:.0f} s)", flush=True)
    case = load_case(EARTH)
    pb = compile_problem(case)
    r = fit_problem(pb)
    c = class_test(pb, r)
    print("BSE McDonough & Sun (1995), Earth case:", c["statement"],
          f"LR {c['lr_statistic']:.2f}, p {c['p_value']:.3g}, chi2 {c['chi2_common']:.2f} -> "
          f"{c['chi2_split']:.2f}, blocks {c['split_components']}, depleted "
          f"{c['n_depleted']}  ({time.time() - t:.0f} s)", flush=True)


if __name__ == "__main__":
    main()
