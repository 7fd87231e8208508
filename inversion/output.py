"""Writing results: atomic result folders, JSON encoding, provenance.

A result folder is written into a temporary sibling folder and put in place by renames
only (:func:`atomic_folder`), so a failure, a Ctrl-C or a kill at any moment leaves
either the previous complete result or nothing, never a mixture or a partial folder.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import platform
import re
import secrets
import shutil
import tempfile
from collections.abc import Iterator
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np

import components

__all__ = ["atomic_folder", "atomic_file", "check_out_folder", "clean_stale",
           "clean_stale_files", "RESULT_MARK", "write_json",
           "provenance", "case_provenance", "to_jsonable",
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


#: Empty file that marks a folder written by :func:`atomic_folder`; only such a folder
#: (or an empty one, or one holding a known result file) is ever replaced.
RESULT_MARK = ".planetmix-result"
_KNOWN_RESULTS = ("fit.json", "ranking.json", "sample.json", "planet.json", "comparison.csv",
                  "summary.json", "run.json")


def _side_name(out: Path, kind: str) -> re.Pattern[str]:
    return re.compile(rf"\.{re.escape(out.name)}\.{kind}-(\d+)-[A-Za-z0-9_]+")


def _alive(pid: int) -> bool:
    """Whether process ``pid`` runs (this one counts as running)."""
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def clean_stale(out: str | Path) -> list[Path]:
    """Remove what killed runs left beside ``out``; returns the paths removed.

    A temporary folder ``.NAME.tmp-PID-*`` or a displaced earlier result
    ``.NAME.old-PID-*`` whose process no longer runs is deleted, except that a displaced
    earlier result is put back when ``out`` itself is missing (the run was killed
    between its two renames, see :func:`atomic_folder`).
    """
    out = Path(os.path.abspath(out))
    removed: list[Path] = []
    if not out.parent.is_dir():
        return removed
    for kind in ("old", "tmp"):
        pat = _side_name(out, kind)
        for side in sorted(out.parent.glob(f".{glob_escape(out.name)}.{kind}-*")):
            m = pat.fullmatch(side.name)
            if not m or _alive(int(m.group(1))):
                continue
            if kind == "old" and not os.path.lexists(out):
                os.rename(side, out)
                continue
            shutil.rmtree(side, ignore_errors=True)
            removed.append(side)
    return removed


def glob_escape(name: str) -> str:
    """``name`` with glob wild cards escaped."""
    import glob

    return glob.escape(name)


def check_out_folder(out: str | Path, *, field: str = "--out") -> Path:
    """Refuse an ``--out`` that cannot be replaced safely, before any work is done.

    Refused: an existing file, the current folder or one of its parents, and a non-empty
    folder that planetmix did not write (it would be replaced wholesale).
    """
    from .exceptions import InputError

    path = Path(os.path.abspath(out))
    if os.path.lexists(path) and not path.is_dir():
        raise InputError("exists and is not a folder; choose a folder name for the results",
                         file=str(out), field=field)
    cwd = Path.cwd()
    if path == cwd or path in cwd.parents:
        raise InputError("is the current folder or one above it; give a new folder for the "
                         "results", file=str(out), field=field)
    if path.is_dir():
        try:
            names = set(os.listdir(path))
        except OSError as err:
            raise InputError(f"cannot be read ({err.strerror})", file=str(out),
                             field=field) from None
        if names and RESULT_MARK not in names and not names & set(_KNOWN_RESULTS):
            raise InputError("is a folder that planetmix did not write and would be replaced "
                             "whole; give a new or empty folder", file=str(out), field=field)
    return path


@contextlib.contextmanager
def atomic_folder(out: str | Path) -> Iterator[Path]:
    """Yield a temporary folder beside ``out``; on success it replaces ``out`` whole.

    The block writes into ``.NAME.tmp-PID-*`` beside ``out``. When it ends without error:
    if ``out`` does not exist, one rename puts the new folder in place; if it does (an
    earlier result), it is first renamed away to ``.NAME.old-PID-*``, then the new folder
    is renamed in, then the old one is deleted. Between those two renames (a few
    microseconds) ``out`` is missing; a run killed there leaves both complete folders
    aside and the next run puts the earlier result back (:func:`clean_stale`). On an
    error, a Ctrl-C or a kill, ``out`` keeps the earlier result or stays absent. Files
    of the earlier result are never mixed with new ones.
    """
    out = check_out_folder(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    clean_stale(out)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.tmp-{os.getpid()}-", dir=out.parent))
    try:
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o777 & ~mask)
        (tmp / RESULT_MARK).touch()
        yield tmp
        if os.path.lexists(out):
            old = out.with_name(f".{out.name}.old-{os.getpid()}-{secrets.token_hex(6)}")
            os.rename(out, old)
            os.rename(tmp, out)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(tmp, out)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)


@contextlib.contextmanager
def atomic_file(target: str | Path) -> Iterator[Path]:
    """Yield a temporary path beside ``target``; on success it replaces ``target``.

    The temporary file is ``.NAME.tmp-PID-*`` in the target's folder; one
    :func:`os.replace` puts it in place, so ``target`` holds the earlier file or the new
    one, never a part. On an error or a Ctrl-C the temporary file is removed; one left by
    a killed run (its process no longer runs) is removed by the next run writing the
    same target (:func:`clean_stale_files`).
    """
    target = Path(os.path.abspath(target))
    target.parent.mkdir(parents=True, exist_ok=True)
    clean_stale_files(target)
    fd, name = tempfile.mkstemp(prefix=f".{target.name}.tmp-{os.getpid()}-",
                                dir=target.parent)
    os.close(fd)
    tmp = Path(name)
    try:
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o666 & ~mask)
        yield tmp
        os.replace(tmp, target)
    finally:
        if os.path.lexists(tmp):
            tmp.unlink()


def clean_stale_files(target: str | Path) -> list[Path]:
    """Remove the temporary files of killed runs beside ``target``; returns them.

    Removed: ``.NAME.tmp-PID-*`` (:func:`atomic_file`) whose process no longer runs,
    and the report's older temporary files ``.report.*.html`` of the same folder that
    are over an hour old (they carry no process id).
    """
    import time

    target = Path(os.path.abspath(target))
    removed: list[Path] = []
    if not target.parent.is_dir():
        return removed
    pat = _side_name(target, "tmp")
    for side in target.parent.glob(f".{glob_escape(target.name)}.tmp-*"):
        m = pat.fullmatch(side.name)
        if m and not _alive(int(m.group(1))) and side.is_file():
            side.unlink(missing_ok=True)
            removed.append(side)
    now = time.time()
    for side in target.parent.glob(".report.*.html"):
        try:
            old = now - side.lstat().st_mtime > 3600
        except OSError:
            continue
        if old and side.is_file():
            side.unlink(missing_ok=True)
            removed.append(side)
    return removed


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
    for pkg in ("numpy", "scipy", "pandas", "cvxpy", "pymc", "pytensor", "nutpie", "jax",
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


def _core_choices(case: Any) -> dict[str, Any]:
    """``[core]`` partitioning model, HSE set and metal activity model, with sources."""
    from .conditions import _choices

    return {"partitioning": case.core.partitioning, **_choices(case)}


def case_provenance(case: Any, p: Any, *, tables: list[str] | None = None,
                    extra: dict[str, Any] | None = None) -> dict[str, Any]:
    """Provenance of a result computed from a case file and its compiled problem.

    Records the case and target files, the reference element, the condensation table,
    the normaliser of the abundances (``normaliser``), the iron split, the partition
    coefficients in use and the building blocks, on top of :func:`provenance`;
    ``tables`` and ``extra`` add what the method itself used.
    """
    core = ({"mantle_FeO_wt": case.core.mantle_FeO_wt}
            if case.core.mantle_FeO_wt is not None else {"dIW": case.core.dIW})
    info = {"case_file": case.path, "target_table": case.target.path,
            "reference_element": p.reference, "condensation_table": p.condensation_table,
            "normaliser": getattr(p, "normaliser", "CI"), "iron_split": core,
            "partition_coefficients": dict(zip(p.elements, map(float, p.D), strict=True)),
            "core_partitioning": _core_choices(case),
            "uncertainty_defaulted": list(case.target.uncertainty_defaulted)}
    info.update(extra or {})
    return provenance(
        tables=[p.condensation_table, "mcdonough2003", "mcdonoughsun1995", "walker2009",
                *(tables or [])],
        component_names=list(p.components) + ([p.late_name] if p.late_name else [])
        + list(dict.fromkeys(["CI", getattr(p, "normaliser", "CI")])),
        extra=info)
