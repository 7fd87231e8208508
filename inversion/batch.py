"""Catalogues at scale: the star-to-planet computation for every star of a catalogue.

The catalogue is cut into partitions of consecutive rows. Each partition is computed in
one vectorised pass (every star's Monte Carlo draws stacked) and written as one Parquet
file, atomically (a temporary file renamed into place), so a run killed part-way
resumes with ``resume=True`` and loses or duplicates nothing. Partitions run in this
process or on Dask (a local cluster, or an existing cluster by its scheduler address);
each star's draws come from its own seed (:func:`inversion.star.star_seed`), so every
path gives identical results.

Output folder: ``run.json`` (settings and catalogue fingerprint, checked on resume),
``parts/part-NNNNN.parquet`` (``pandas.read_parquet(folder / "parts")`` reads them all;
one row per catalogue row: ``row``, ``star_id``, ``status``
``ok``/``failed``, ``reason``, flags, and for each quantity of the hand-off the columns
``<quantity>_<stat>`` with stat in p2.5, p16, median, p84, p97.5), and at the end
``summary.json`` and ``failed.csv``.
"""

from __future__ import annotations

import hashlib
import os
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

import components

from .exceptions import InputError
from .handoff import PERCENTILES, STATS
from .output import _alive
from .star import (
    STAR_ELEMENTS,
    StarInput,
    StarSettings,
    planets_from_xh,
    star_model,
    star_seed,
    xh_from_normals,
)

__all__ = ["read_catalogue", "CatalogueRow", "run_partition", "run_batch", "BatchSummary",
           "partition_name", "quantiles_by_group", "local_cluster", "tune_allocator", "warm_worker",
           "write_partition",
           "ALLOCATOR_ENV"]

#: glibc allocator settings for the processes of a batch: the large temporary arrays of a
#: partition are then reused from the heap instead of being mapped and unmapped (and their
#: pages faulted in again) at every operation. Dask's own default for its workers
#: (MALLOC_TRIM_THRESHOLD_=65536) makes this workload spend ~a third of its time in the
#: kernel. Memory freed stays with the process up to these sizes.
ALLOCATOR_ENV: dict[str, str] = {"MALLOC_MMAP_THRESHOLD_": str(512 * 2**20),
                                 "MALLOC_TRIM_THRESHOLD_": str(2**30)}

_PART = "part-{:05d}.parquet"
#: Sub-folder of the output folder that holds the partitions and nothing else, so that
#: ``pandas.read_parquet(out / PARTS_DIR)`` reads the whole catalogue's results.
PARTS_DIR = "parts"
#: Draws computed together inside a partition.
BLOCK_DRAWS = 25_000
_FLAG_COLUMNS = ("row", "star_id", "status", "reason", "solar_ratio", "ci_reference",
                 "not_used", "infeasible_draw_fraction", "n_draws")


def partition_name(i: int) -> str:
    """File name of partition ``i``."""
    return _PART.format(i)


@dataclass(frozen=True)
class CatalogueRow:
    """One catalogue row: the star, or the reason it cannot be computed."""

    row: int
    star_id: str
    star: StarInput | None
    reason: str = ""


#: Cell texts read as "not measured".
_EMPTY = ("", "nan", "na", "null")


def read_catalogue(path: str | Path) -> tuple[list[CatalogueRow], str]:
    """Read and check a catalogue; returns its rows and the SHA-256 of the file.

    Columns: ``star_id``, then for each element a column named by its symbol ([X/H],
    dex) and ``<symbol>_err`` (1-sigma, dex). A column that is neither is a file-level
    error (:class:`InputError`). Row-level problems (a value that is not a number, a
    value without its uncertainty, an empty or repeated star_id) are kept on the row as
    its reason: the batch records them and carries on.
    """
    from components._tables import read_csv_rows
    from components.units import PLAUSIBLE

    file = str(path)
    tab = read_csv_rows(path, what="catalogue")
    if "star_id" not in tab.header:
        raise InputError("catalogue file lacks the column star_id", file=file, row=1)
    if not tab.rows:
        raise InputError("catalogue file has a header but no data rows", file=file)
    df = tab.frame()
    known = components.elements().index
    elements: list[str] = []
    for col in df.columns:
        if col == "star_id":
            continue
        base = col[:-4] if col.endswith("_err") else col
        if base not in known or base == "H":
            raise InputError("unknown column: not star_id, an element symbol or "
                             "<symbol>_err; rename or remove it", file=file, field=col,
                             value=col)
        if col.endswith("_err") and base not in df.columns:
            raise InputError(f"uncertainty column without its value column {base}", file=file,
                             field=col)
        if not col.endswith("_err"):
            elements.append(col)
    n = len(df)
    V = np.full((n, len(elements)), np.nan)
    E = np.full((n, len(elements)), np.nan)
    reason = [""] * n
    width = len(tab.header)
    for i, w in enumerate(tab.widths):
        if w != width:
            # a short row (a file cut mid-row) or an extra field shifts or drops values:
            # the row is not computed
            reason[i] = (f"the row has {w} fields, the header {width}; check for a missing "
                         "or extra comma")
    xh_lim, sig_lim = PLAUSIBLE["star_xh_dex"], PLAUSIBLE["star_sigma_dex"]

    def note(mask: np.ndarray, text: str, raw: pd.Series) -> None:
        for i in np.flatnonzero(mask):
            if not reason[i]:
                reason[i] = f"{text} (value {raw.iloc[i]!r})" if raw.iloc[i] else text

    # parsed column by column (vectorised); a row's reason is its first problem
    for j, e in enumerate(elements):
        raw = df[e].str.strip()
        empty = raw.str.lower().isin(_EMPTY).to_numpy()
        num = pd.to_numeric(raw.where(~empty), errors="coerce").to_numpy(float)
        bad = ~empty & ~np.isfinite(num)
        col = f"{e}_err"
        err_raw = df[col].str.strip() if col in df.columns else pd.Series([""] * n)
        err_empty = err_raw.str.lower().isin(_EMPTY).to_numpy()
        err = pd.to_numeric(err_raw.where(~err_empty), errors="coerce").to_numpy(float)
        has = ~empty & ~bad
        note(bad, f"[{e}/H] is not a number", raw)
        with np.errstate(invalid="ignore"):
            note(~empty & ~bad & ((num < xh_lim.low) | (num > xh_lim.high)),
                 f"[{e}/H] lies outside {xh_lim.describe()}: {xh_lim.reason}", raw)
        note(has & err_empty, f"missing uncertainty for [{e}/H]", err_raw)
        with np.errstate(invalid="ignore"):
            note(has & ~err_empty & ~np.isfinite(err), f"uncertainty of [{e}/H] is not a "
                 "number", err_raw)
            note(has & ~err_empty & np.isfinite(err) & (err < 0), f"uncertainty of [{e}/H] "
                 "must be a non-negative number of dex", err_raw)
            note(has & ~err_empty & np.isfinite(err) & (err > sig_lim.high),
                 f"uncertainty of [{e}/H] lies outside {sig_lim.describe()}: "
                 f"{sig_lim.reason}", err_raw)
        V[:, j] = np.where(has, num, np.nan)
        E[:, j] = err
    used = [j for j, e in enumerate(elements) if e in STAR_ELEMENTS]
    rows: list[CatalogueRow] = []
    first: dict[str, int] = {}
    for i, sid in enumerate(df["star_id"].str.strip()):
        row = i + 2
        if sid == "":
            rows.append(CatalogueRow(row, sid, None, "empty star_id"))
            continue
        if sid in first:
            rows.append(CatalogueRow(row, sid, None,
                                     f"duplicate star_id (first on row {first[sid]})"))
            continue
        first[sid] = row
        if reason[i]:
            rows.append(CatalogueRow(row, sid, None, reason[i]))
            continue
        vi, ei = V[i], E[i]
        here = [j for j in used if vi[j] == vi[j]]
        unused = tuple(sorted(elements[j] for j in range(len(elements))
                              if j not in used and vi[j] == vi[j]))
        rows.append(CatalogueRow(row, sid, StarInput(
            sid, {elements[j]: float(vi[j]) for j in here},
            {elements[j]: float(ei[j]) for j in here}, unused)))
    digest = hashlib.sha256(Path(path).read_bytes()).hexdigest()
    return rows, digest


def quantiles_by_group(values: np.ndarray, n_groups: int) -> np.ndarray:
    """Percentiles :data:`inversion.handoff.PERCENTILES` of each group's draws.

    ``values`` (G * D, Q) holds G groups of D consecutive draws; returns (G, 5, Q) with
    numpy's default (linear) interpolation; NaN draws are ignored.
    """
    G = n_groups
    v = values.reshape(G, -1, values.shape[1])
    out = np.empty((G, len(PERCENTILES), v.shape[2]))
    bad = np.isnan(v).any(axis=(1, 2))
    good = ~bad
    if good.any():
        s = np.sort(np.swapaxes(v[good], 1, 2), axis=2)  # (G, Q, D): contiguous sorts
        D = s.shape[2]
        pos = np.asarray(PERCENTILES) / 100.0 * (D - 1)
        lo = np.floor(pos).astype(int)
        hi = np.minimum(lo + 1, D - 1)
        frac = pos - lo
        q = s[:, :, lo] * (1.0 - frac) + s[:, :, hi] * frac  # (G, Q, 5)
        out[good] = np.swapaxes(q, 1, 2)
    for g in np.flatnonzero(bad):
        with np.errstate(all="ignore"):
            import warnings

            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                out[g] = np.nanpercentile(v[g], PERCENTILES, axis=0)
    return out


def run_partition(rows: list[CatalogueRow], settings: StarSettings) -> pd.DataFrame:
    """Compute one partition: every good star's draws in one vectorised pass.

    Returns one row per catalogue row with its status, reason, flags and the summary
    columns ``<quantity>_<stat>``.
    """
    model = star_model(settings)
    D = settings.draws
    good = [r for r in rows if r.star is not None]
    meta: dict[int, dict[str, Any]] = {}
    frames = []
    if good:
        n = len(STAR_ELEMENTS)
        bs = max(1, BLOCK_DRAWS // D)
        qs, oks, names = [], [], None
        # blocks of ~BLOCK_DRAWS draws: the temporaries stay in cache (~35 % faster than
        # one pass over the partition); every draw's result is independent of the others
        for b in range(0, len(good), bs):
            blk = good[b:b + bs]
            z = np.concatenate([np.random.default_rng(star_seed(settings.seed, r.star_id))
                                .standard_normal((D, n)) for r in blk], axis=0)
            xh, missing = xh_from_normals([r.star for r in blk], z)
            for r, miss in zip(blk, missing, strict=True):
                meta[r.row] = {"solar_ratio": " ".join(miss),
                               "not_used": " ".join(r.star.unused)}
            draws, ok = planets_from_xh(xh, model)
            cols = draws.columns(bulk=False, history=False)
            if draws.heat_history_w_per_kg is not None:
                cols[f"heat_W_per_kg_{draws.history_gyr[-1]:g}Gyr"] = \
                    draws.heat_history_w_per_kg[:, -1]
            names = list(cols) if names is None else names
            vals = np.empty((xh.shape[0], len(names)))
            for j, name in enumerate(names):
                vals[:, j] = cols[name]
            vals[~ok] = np.nan
            qs.append(quantiles_by_group(vals, len(blk)))
            oks.append(ok.reshape(len(blk), D))
        q = np.concatenate(qs, axis=0)
        okg = np.concatenate(oks, axis=0)
        cols = {f"{name}_{stat}": q[:, s, j] for j, name in enumerate(names)
                for s, stat in enumerate(STATS)}
        summ = pd.DataFrame(cols)
        summ["row"] = [r.row for r in good]
        summ["infeasible_draw_fraction"] = 1.0 - okg.mean(axis=1)
        frames.append(summ)
    base = pd.DataFrame({
        "row": [r.row for r in rows],
        "star_id": [r.star_id for r in rows],
        "status": ["ok" if r.star is not None else "failed" for r in rows],
        "reason": [r.reason for r in rows],
        "solar_ratio": [meta.get(r.row, {}).get("solar_ratio", "") for r in rows],
        "ci_reference": [" ".join(model.ci_reference) if r.star is not None else ""
                         for r in rows],
        "not_used": [meta.get(r.row, {}).get("not_used", "") for r in rows],
        "n_draws": [D if r.star is not None else 0 for r in rows],
    })
    out = base.merge(frames[0], on="row", how="left") if frames else base
    if "infeasible_draw_fraction" not in out:
        out["infeasible_draw_fraction"] = np.nan
    allbad = out["infeasible_draw_fraction"] >= 1.0
    if allbad.any():
        out.loc[allbad, "status"] = "failed"
        out.loc[allbad, "reason"] = (f"no draw is feasible: a mantle FeO of "
                                     f"{settings.mantle_FeO_wt} wt% needs more iron than the "
                                     "star provides")
    # a star whose median results are not finite is never written as a success
    medians = [c for c in out.columns if c.endswith("_median")]
    if medians:
        nonfinite = (out["status"] == "ok") & ~np.isfinite(
            out[medians].to_numpy(dtype=float)).all(axis=1)
        if nonfinite.any():
            out.loc[nonfinite, "status"] = "failed"
            out.loc[nonfinite, "reason"] = "non-finite results; check the star's values"
    lead = list(_FLAG_COLUMNS)
    return out[lead + [c for c in out.columns if c not in lead]]


def warm_worker(settings: StarSettings) -> bool:
    """Import the engine and build the star model in a Dask worker (run once per worker
    before the partitions, so the first partitions do not carry the start-up cost)."""
    star_model(settings)
    return True


def tune_allocator() -> bool:
    """Apply :data:`ALLOCATOR_ENV` to this process (glibc ``mallopt``); False elsewhere.

    Called by the command line for its own process only, never by library functions.
    """
    import ctypes
    import ctypes.util
    import sys

    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        m_trim, m_mmap = -1, -3  # mallopt parameters of glibc's malloc.h
        ok = libc.mallopt(m_mmap, int(ALLOCATOR_ENV["MALLOC_MMAP_THRESHOLD_"]))
        ok &= libc.mallopt(m_trim, int(ALLOCATOR_ENV["MALLOC_TRIM_THRESHOLD_"]))
        return bool(ok)
    except (OSError, AttributeError):
        return False


def local_cluster(workers: int, *, processes: bool = True) -> Any:
    """A ``distributed.LocalCluster`` of ``workers`` single-threaded worker processes, with
    :data:`ALLOCATOR_ENV` in their environment (and one BLAS thread each)."""
    import dask
    from distributed import LocalCluster

    env = dict(dask.config.get("distributed.nanny.pre-spawn-environ", default={}) or {})
    env.update(ALLOCATOR_ENV)
    with dask.config.set({"distributed.nanny.pre-spawn-environ": env}):
        return LocalCluster(n_workers=workers, threads_per_worker=1, processes=processes,
                            dashboard_address=None)


def _write_parquet_atomic(df: pd.DataFrame, path: Path) -> None:
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    df.to_parquet(tmp, index=False)
    os.replace(tmp, path)


def write_partition(rows: list[CatalogueRow], settings: StarSettings,
                    path: str | Path) -> str:
    """Compute one partition and write it atomically (temporary file, then rename)."""
    _write_parquet_atomic(run_partition(rows, settings), Path(path))
    return str(path)


@dataclass(frozen=True)
class BatchSummary:
    """What a batch run did: stars done, failed (with reasons), partitions skipped."""

    n_rows: int
    n_done: int
    n_failed: int
    n_partitions: int
    partitions_computed: int
    partitions_skipped: int
    stars_skipped: int
    failed: pd.DataFrame
    seconds: float
    complete: bool

    def to_dataframe(self) -> pd.DataFrame:
        """The summary table printed at the end of a run."""
        return pd.DataFrame([
            ("catalogue rows", self.n_rows),
            ("stars done", self.n_done),
            ("stars failed", self.n_failed),
            ("partitions computed this run", self.partitions_computed),
            ("partitions skipped (already done)", self.partitions_skipped),
            ("stars in skipped partitions", self.stars_skipped),
        ], columns=["item", "count"])


def _fingerprint(digest: str, settings: StarSettings, partition_size: int) -> dict[str, Any]:
    s = settings.as_dict()
    s["pattern"] = {k: v for k, v in s["pattern"].items() if k != "origin"}
    return {"catalogue_sha256": digest, "settings": s, "partition_size": partition_size}


def _chunks(rows: list[CatalogueRow], size: int) -> Iterator[tuple[int, list[CatalogueRow]]]:
    for i in range(0, len(rows), size):
        yield i // size, rows[i:i + size]


def run_batch(catalogue: str | Path, out: str | Path, settings: StarSettings, *,
              partition_size: int = 200, resume: bool = False, client: Any = None,
              max_partitions: int | None = None, progress: bool = True,
              workers_write: bool = False) -> BatchSummary:
    """Run the star-to-planet computation for every star of a catalogue.

    Parameters
    ----------
    catalogue : str or Path
        The catalogue CSV (see :func:`read_catalogue`).
    out : str or Path
        Result folder.
    settings : StarSettings
    partition_size : int
        Catalogue rows per partition (one Parquet file each).
    resume : bool
        Skip partitions already written by a run with the same catalogue and settings.
    client : distributed.Client, optional
        Run the partitions on this Dask client; None computes them in this process.
    max_partitions : int, optional
        Stop after computing this many partitions (the rest are left for a resumed run).
    progress : bool
        Progress bar on standard error.
    workers_write : bool
        With a client: each worker writes its partition file itself (atomically) and
        returns only its name. Needs ``out`` on a file system the workers share (always
        true of a local cluster); otherwise the results travel to this process, which
        writes them.

    Returns
    -------
    BatchSummary
    """
    from tqdm.auto import tqdm

    from .output import provenance, write_json

    t0 = time.perf_counter()
    if partition_size < 1:
        raise InputError("must be at least 1", field="--partition-size", value=partition_size)
    rows, digest = read_catalogue(catalogue)
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    fp = _fingerprint(digest, settings, partition_size)
    run_file = out / "run.json"
    if list(out.glob("part-*.parquet")):
        raise InputError(f"the folder holds partitions beside run.json (an older layout); "
                         f"move the part-*.parquet files into {PARTS_DIR}/ to resume it",
                         file=str(out))
    pdir = out / PARTS_DIR
    pdir.mkdir(exist_ok=True)
    existing = sorted(pdir.glob("part-*.parquet"))
    if run_file.exists() or existing:
        if not resume:
            raise InputError("the folder holds results of an earlier run; add --resume to "
                             "continue it or choose another --out", file=str(out))
        import json

        from components._tables import read_text_checked

        old = {}
        if run_file.exists():
            try:
                old = json.loads(read_text_checked(run_file, what="batch run record"))
            except (json.JSONDecodeError, RecursionError):
                old = None
            if not isinstance(old, dict):
                raise InputError("the run record is damaged (not a JSON object); start "
                                 "again in another --out", file=str(run_file))
        if {k: old.get(k) for k in fp} != _jsonable(fp):
            raise InputError("--resume with another catalogue or other settings than the "
                             "run in this folder; use the same options or another --out",
                             file=str(run_file))
    else:
        tmp = out / f".run.json.tmp-{os.getpid()}"
        write_json(tmp, {**fp, "provenance": provenance(
            tables=[settings.solar, settings.pattern.condensation_table, "lodders2003",
                    "mcdonough2003", "mcdonoughsun1995", "turcotteschubert2014"],
            component_names=["CI", "BSE_MS95"],
            extra={"catalogue": str(Path(catalogue).resolve()), "command": "batch"})})
        os.replace(tmp, run_file)
    # temporary files of runs killed while writing (partitions, run.json, summary.json,
    # failed.csv); those of a process still running are left alone
    for stale in [*pdir.glob(".part-*.parquet.tmp-*"), *out.glob(".*.tmp-*")]:
        pid = stale.name.rsplit("-", 1)[-1]
        if stale.is_file() and not (pid.isdigit() and _alive(int(pid))):
            stale.unlink(missing_ok=True)
    parts = list(_chunks(rows, partition_size))
    todo = [(i, r) for i, r in parts if not (pdir / partition_name(i)).exists()]
    skipped = [(i, r) for i, r in parts if (pdir / partition_name(i)).exists()]
    if max_partitions is not None:
        todo = todo[:max_partitions]
    bar = tqdm(total=sum(len(r) for _, r in todo), desc="stars", unit="star",
               disable=not progress)
    if client is None:
        for i, r in todo:
            write_partition(r, settings, pdir / partition_name(i))
            bar.update(len(r))
    else:
        from distributed import as_completed

        # every worker imports the engine and builds the model once, before any partition
        client.run(warm_worker, settings)
        # a bounded window of partitions in flight: memory stays flat for any catalogue
        s_future = client.scatter(settings, broadcast=True)
        window = max(4, 2 * sum(client.nthreads().values()))
        # task keys unique to this run: a later run on the same client never picks up
        # an earlier run's results
        run_token = uuid.uuid4().hex[:12]
        queue = iter(todo)
        futs: dict[Any, tuple[int, int]] = {}
        ac = as_completed()

        def submit_next() -> None:
            nxt = next(queue, None)
            if nxt is not None:
                i, r = nxt
                key = f"planetmix-partition-{i:05d}-{run_token}"
                if workers_write:
                    f = client.submit(write_partition, r, s_future,
                                      str(pdir.resolve() / partition_name(i)), pure=False,
                                      key=key)
                else:
                    f = client.submit(run_partition, r, s_future, pure=False, key=key)
                futs[f] = (i, len(r))
                ac.add(f)

        for _ in range(window):
            submit_next()
        for fut in ac:
            i, n = futs.pop(fut)
            res = fut.result()
            if not workers_write:
                _write_parquet_atomic(res, pdir / partition_name(i))
            fut.release()
            bar.update(n)
            submit_next()
    bar.close()
    done_files = sorted(pdir.glob("part-*.parquet"))
    status = (pd.concat([pd.read_parquet(f, columns=["row", "star_id", "status", "reason"])
                         for f in done_files], ignore_index=True)
              if done_files else pd.DataFrame(columns=["row", "star_id", "status", "reason"]))
    failed = status[status["status"] != "ok"].sort_values("row").reset_index(drop=True)
    complete = len(done_files) == len(parts)
    summary = BatchSummary(
        n_rows=len(rows), n_done=int((status["status"] == "ok").sum()), n_failed=len(failed),
        n_partitions=len(parts), partitions_computed=len(todo),
        partitions_skipped=len(skipped), stars_skipped=sum(len(r) for _, r in skipped),
        failed=failed, seconds=time.perf_counter() - t0, complete=complete)
    tmp = out / f".summary.json.tmp-{os.getpid()}"
    write_json(tmp, {"complete": complete, "catalogue_rows": summary.n_rows,
                     "stars_done": summary.n_done, "stars_failed": summary.n_failed,
                     "partitions": summary.n_partitions,
                     "partitions_computed_this_run": summary.partitions_computed,
                     "partitions_skipped": summary.partitions_skipped,
                     "stars_skipped": summary.stars_skipped,
                     "seconds_this_run": summary.seconds,
                     "failed": failed[["row", "star_id", "reason"]].to_dict("records")})
    os.replace(tmp, out / "summary.json")
    tmp = out / f".failed.csv.tmp-{os.getpid()}"
    failed[["row", "star_id", "reason"]].to_csv(tmp, index=False)
    os.replace(tmp, out / "failed.csv")
    return summary


def _jsonable(obj: Any) -> Any:
    import json

    from .output import to_jsonable

    return json.loads(json.dumps(to_jsonable(obj)))

