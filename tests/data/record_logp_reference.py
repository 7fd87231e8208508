"""Record the Bayesian model's log density (and gradient) on the demo case at random
unconstrained points, for the agreement test of the single model.

    .venv/bin/python -m tests.data.record_logp_reference

Writes ``tests/data/logp_reference.json`` (the commit of the implementation recorded).
The problem itself is taken from ``forward_reference.json.gz`` (demo, both iron splits),
so that library changes do not move the reference.
"""

from __future__ import annotations

import json
import subprocess
from pathlib import Path

import numpy as np

from inversion.bayes import build_model

from .reference_problems import load_reference_problem

ROOT = Path(__file__).resolve().parents[2]
OUT = Path(__file__).with_name("logp_reference.json")


def main() -> None:
    rng = np.random.default_rng(7)
    commit = subprocess.run(["git", "rev-parse", "HEAD"], cwd=ROOT, capture_output=True,
                            text=True).stdout.strip()
    rec = {"commit": commit, "runs": []}
    for case, variant in (("demo", "feo"), ("demo", "redox"), ("mars", "feo")):
        p = load_reference_problem(case, variant)
        model = build_model(p)
        logp = model.compile_logp()
        dlogp = model.compile_dlogp()
        ip = model.initial_point()
        for _ in range(3):
            pt = {k: np.asarray(v) + rng.normal(0, 0.3, np.shape(v)) for k, v in ip.items()}
            rec["runs"].append({"case": case, "variant": variant,
                                "point": {k: np.atleast_1d(v).tolist() for k, v in pt.items()},
                                "shapes": {k: list(np.shape(v)) for k, v in pt.items()},
                                "logp": float(logp(pt)),
                                "dlogp": np.asarray(dlogp(pt)).tolist(),
                                "order": [v.name for v in model.value_vars]})
    OUT.write_text(json.dumps(rec), encoding="utf-8")
    print(f"wrote {OUT} from commit {commit[:10]}")


if __name__ == "__main__":
    main()
