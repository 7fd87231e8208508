"""Writing results: atomic file writes, JSON encoding, provenance.

A result folder is written into a temporary sibling folder and renamed into place at the
end, so an interrupted run or a failure never leaves partial output.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import platform
import shutil
import tempfile
from collections.abc import Iterator
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np

import components

__all__ = ["atomic_folder", "write_json", "provenance", "case_provenance", "to_jsonable",
           "package_version"]


def package_version() -> str:
    """Installed planetmix version."""
    try:
        return metadata.version("planetmix")
    except metadata.PackageNotFoundError:  # pragma: no cover - running from a source tree
        return "0+unknown"


def to_jsonable(obj: Any) -> Any:
    """Convert numpy scalars/arrays, pandas objects and non-finite floats for JSON."""
    import pandas as pd

    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, pd.Series):
        return to_jsonable(obj.to_dict())
    if isinstance(obj, np.generic):
        return to_jsonable(obj.item())
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def write_json(path: Path, data: dict[str, Any]) -> None:
    """Write JSON (non-finite numbers become null)."""
    path.write_text(json.dumps(to_jsonable(data), indent=2, sort_keys=False) + "\n",
                    encoding="utf-8")


@contextlib.contextmanager
def atomic_folder(out: str | Path) -> Iterator[Path]:
    """Yield a temporary folder; on success its files replace those in ``out``.

    Files already in ``out`` that the run does not write are left alone; files it writes
    appear all at once (each by an atomic rename) only when the block ends without error.
    """
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=out.parent))
    try:
        yield tmp
        out.mkdir(parents=True, exist_ok=True)
        for item in tmp.iterdir():
            dest = out / item.name
            if dest.is_dir() and not dest.is_symlink():
                shutil.rmtree(dest)
            os.replace(item, dest)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def provenance(*, tables: list[str], extra: dict[str, Any] | None = None,
               component_names: list[str] | None = None) -> dict[str, Any]:
    """What produced a result: versions, reference tables and their sources, settings."""
    srcs = components.sources()
    keys: set[str] = set()
    comp_info = {}
    for name in component_names or []:
        try:
            c = components.load(name)
        except components.InputError:
            continue
        keys |= set(c.source_keys)
        comp_info[name] = {"file": Path(c.path).name, "description": c.description,
                           "sources": list(c.source_keys),
                           "recalled_values": int(c.recalled.sum())}
    keys |= {k for k in tables if k in srcs.index}
    versions = {}
    for pkg in ("numpy", "scipy", "pandas", "cvxpy", "pymc", "pytensor", "nutpie", "numba",
                "arviz", "periodictable"):
        try:
            versions[pkg] = metadata.version(pkg)
        except metadata.PackageNotFoundError:
            versions[pkg] = None
    out = {
        "planetmix_version": package_version(),
        "created_utc": datetime.now(UTC).isoformat(timespec="seconds"),
        "python": platform.python_version(),
        "packages": versions,
        "reference_tables": tables,
        "components": comp_info,
        "sources": {k: srcs.loc[k, "citation"] for k in sorted(keys)},
    }
    if extra:
        out.update(extra)
    return out


def case_provenance(case: Any, p: Any, *, tables: list[str] | None = None,
                    extra: dict[str, Any] | None = None) -> dict[str, Any]:
    """Provenance of a result computed from a case file and its compiled problem.

    Records the case and target files, the reference element, the condensation table,
    the iron split, the partition coefficients in use and the building blocks, on top of
    :func:`provenance`; ``tables`` and ``extra`` add what the method itself used.
    """
    core = ({"mantle_FeO_wt": case.core.mantle_FeO_wt}
            if case.core.mantle_FeO_wt is not None else {"dIW": case.core.dIW})
    info = {"case_file": case.path, "target_table": case.target.path,
            "reference_element": p.reference, "condensation_table": p.condensation_table,
            "iron_split": core,
            "partition_coefficients": dict(zip(p.elements, map(float, p.D), strict=True)),
            "uncertainty_defaulted": list(case.target.uncertainty_defaulted)}
    info.update(extra or {})
    return provenance(
        tables=[p.condensation_table, "mcdonough2003", "mcdonoughsun1995", "walker2009",
                *(tables or [])],
        component_names=list(p.components) + ([p.late_name] if p.late_name else []) + ["CI"],
        extra=info)
