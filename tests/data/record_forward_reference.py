"""Record the forward model's values for the agreement test of the single model.

Run once, on the implementation being replaced (commit recorded in the file):

    .venv/bin/python tests/data/record_forward_reference.py

For the demo, Earth and Mars cases it stores the compiled problem (every array the
forward model reads, so that later library changes do not move the reference) and the
outputs of ``inversion.model.forward`` at random parameter points, for every volatility
form and for both iron splits (mantle FeO and redox dIW), in
``tests/data/forward_reference.json.gz``.
"""

from __future__ import annotations

import dataclasses
import gzip
import json
import subprocess
from pathlib import Path

import numpy as np

from inversion.case import load_case
from inversion.model import compile_problem, forward
from inversion.volatility import FORMS

ROOT = Path(__file__).resolve().parents[2]
CASES = {"demo": "case_studies/demo/orrin.toml", "earth": "case_studies/earth/case.toml",
         "mars": "case_studies/mars/case.toml"}
OUT = Path(__file__).with_name("forward_reference.json.gz")
KEYS = ("log10N", "ratio", "bulk", "mantle", "core", "M_s", "M_c", "k", "cmf", "v", "x",
        "D_Fe", "logr")


def _jsonable(v):
    if isinstance(v, np.ndarray):
        return {"__array__": v.tolist(), "dtype": str(v.dtype)}
    if isinstance(v, tuple | list):
        return [_jsonable(x) for x in v]
    if isinstance(v, dict):
        return {k: _jsonable(x) for k, x in v.items()}
    if isinstance(v, np.generic):
        return v.item()
    return v


def main() -> None:
    rng = np.random.default_rng(20261202)
    commit = subprocess.run(["git", "rev-parse", "HEAD"], cwd=ROOT, capture_output=True,
                            text=True).stdout.strip()
    record = {"commit": commit, "cases": {}}
    for name, path in CASES.items():
        p = compile_problem(load_case(ROOT / path))
        variants = {"feo": p}
        if p.mantle_Fe is not None:
            variants["redox"] = dataclasses.replace(p, mantle_Fe=None, dIW=-2.2)
        entry = {}
        for vname, q in variants.items():
            fields = {f.name: _jsonable(getattr(q, f.name)) for f in dataclasses.fields(q)}
            runs = []
            for form, spec in FORMS.items():
                qq = dataclasses.replace(q, volatility_form=form)
                B = 5
                K = len(qq.components)
                w = rng.dirichlet(np.ones(K), size=B)
                lo, hi = np.array(spec.lower), np.array(spec.upper)
                vol = lo + (hi - lo) * rng.uniform(0.2, 0.8, size=(B, lo.size))
                if form == "power":  # pivots inside the Tc range (a, b with -b/a in 2.9-3.2)
                    vol[:, 0] = rng.uniform(1.0, 6.0, B)
                    vol[:, 1] = -vol[:, 0] * rng.uniform(2.9, 3.2, B)
                lam = rng.uniform(0.0, 0.01, B) if qq.late_name else np.zeros(B)
                out = forward(qq, w, vol, lam)
                runs.append({"form": form, "w": w.tolist(), "vol": vol.tolist(),
                             "lam": lam.tolist(),
                             "out": {k: np.asarray(out[k]).tolist() for k in KEYS}})
            entry[vname] = {"problem": fields, "runs": runs}
        record["cases"][name] = entry
    with gzip.open(OUT, "wt", encoding="utf-8") as fh:
        json.dump(record, fh)
    print(f"wrote {OUT} ({OUT.stat().st_size / 1e3:.0f} kB) from commit {commit[:10]}")


if __name__ == "__main__":
    main()
