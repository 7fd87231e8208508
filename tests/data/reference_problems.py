"""Problems rebuilt from ``forward_reference.json.gz`` (recorded by
``record_forward_reference.py``): the arrays the forward model reads, frozen at the
recording commit so that later library changes do not move the agreement test."""

from __future__ import annotations

import dataclasses
import gzip
import json
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np

from inversion.model import Problem

PATH = Path(__file__).with_name("forward_reference.json.gz")


@lru_cache(maxsize=1)
def reference_record() -> dict[str, Any]:
    """The whole recorded file."""
    with gzip.open(PATH, "rt", encoding="utf-8") as fh:
        return json.load(fh)


def _restore(v: Any) -> Any:
    if isinstance(v, dict) and "__array__" in v:
        return np.asarray(v["__array__"], dtype=v["dtype"])
    if isinstance(v, dict):
        return {k: _restore(x) for k, x in v.items()}
    if isinstance(v, list):
        return tuple(_restore(x) for x in v)
    return v


def load_reference_problem(case: str, variant: str = "feo") -> Problem:
    """The recorded problem of ``case`` (demo, earth, mars), ``variant`` feo or redox."""
    fields = reference_record()["cases"][case][variant]["problem"]
    names = {f.name for f in dataclasses.fields(Problem)}
    kw = {k: _restore(v) for k, v in fields.items() if k in names}
    kw["isotopes"] = tuple(dict(d) for d in kw.get("isotopes", ()))
    for d in kw["isotopes"]:
        if "range" in d:
            d["range"] = tuple(d["range"])
    return Problem(**kw)


def reference_runs(case: str, variant: str = "feo") -> list[dict[str, Any]]:
    """The recorded parameter points and forward outputs."""
    return reference_record()["cases"][case][variant]["runs"]
