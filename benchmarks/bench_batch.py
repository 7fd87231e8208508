"""Benchmark of `planetmix batch`: synthetic stars x Monte Carlo draws, one process vs Dask.

Usage::

    .venv/bin/python benchmarks/bench_batch.py [--stars 10000] [--draws 500]
        [--partition-size 500] [--workers 2] [--repeat 1]

Prints stars per second for the single-process vectorised path and for a local Dask
cluster of ``--workers`` processes (one thread each), the speed-up, and peak memory
(maximum resident set size of this process and of each worker). Goals (issue 5): under
30 s single-process for 10,000 stars x 500 draws, >= 1.6x with 2 workers, peak memory
under 4 GB. Both runs must give identical tables (checked).
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

# BLAS threads would compete with the Dask workers for the same cores; the hot path uses
# no BLAS, so pin them for a fair comparison (set before numpy is imported).
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from inversion.batch import local_cluster, run_batch, tune_allocator  # noqa: E402
from inversion.star import StarSettings, earth_calibrated_pattern  # noqa: E402

ELEMENTS = ("Fe", "Mg", "Si", "Al", "Ca", "Na", "Ti", "Cr", "Mn", "Ni", "Co", "K", "S", "P")


def synthetic_catalogue(path: Path, n: int, seed: int = 1) -> None:
    """n invented stars: [X/H] scattered around a common [Fe/H], 0.03-0.10 dex errors."""
    rng = np.random.default_rng(seed)
    feh = rng.normal(0.0, 0.2, n)
    cols: dict[str, object] = {"star_id": [f"syn{i:06d}" for i in range(n)]}
    for e in ELEMENTS:
        cols[e] = np.round(feh + rng.normal(0.0, 0.05, n), 3)
        cols[f"{e}_err"] = np.round(rng.uniform(0.03, 0.10, n), 3)
    pd.DataFrame(cols).to_csv(path, index=False)


def _maxrss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _load() -> str:
    return "load average " + " ".join(f"{x:.2f}" for x in os.getloadavg())


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--stars", type=int, default=10_000)
    ap.add_argument("--draws", type=int, default=500)
    ap.add_argument("--partition-size", type=int, default=500)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=1,
                    help="runs of each path; the best wall time counts (a shared machine's "
                         "other load only ever slows a run down)")
    args = ap.parse_args(argv)

    work = Path(tempfile.mkdtemp(prefix="bench_batch_"))
    try:
        cat = work / "catalogue.csv"
        synthetic_catalogue(cat, args.stars)
        settings = StarSettings(pattern=earth_calibrated_pattern(), draws=args.draws, seed=1,
                                planet_mass_kg=5.972e24)
        print(f"{args.stars} stars x {args.draws} draws, partitions of "
              f"{args.partition_size} stars; {os.cpu_count()} cores; {_load()}")

        tuned = tune_allocator()  # as `planetmix batch` does for its own process
        print(f"allocator settings applied: {tuned}")
        singles = []
        for k in range(args.repeat):
            out = work / f"single{k}"
            t = time.perf_counter()
            c = time.process_time()
            s1 = run_batch(cat, out, settings, partition_size=args.partition_size,
                           progress=False)
            singles.append((time.perf_counter() - t, time.process_time() - c))
            print(f"  single process run {k + 1}: {singles[-1][0]:.1f} s wall "
                  f"({singles[-1][1]:.1f} s CPU), {s1.n_done} done, {s1.n_failed} failed; "
                  f"{_load()}")
        t_single = min(w for w, _ in singles)
        rss_single = _maxrss_mb()
        print(f"single process: {t_single:.1f} s, {args.stars / t_single:.0f} stars/s; "
              f"peak RSS {rss_single:.0f} MB")

        from distributed import Client

        from inversion.batch import warm_worker

        dasks = []
        rss_workers: dict[str, float] = {}
        t = time.perf_counter()
        with local_cluster(args.workers) as cluster, Client(cluster) as client:
            client.run(warm_worker, settings)  # imports and model set-up, as run_batch does
            t_start = time.perf_counter() - t
            for k in range(args.repeat):
                t = time.perf_counter()
                s2 = run_batch(cat, work / f"dask{k}", settings,
                               partition_size=args.partition_size, client=client,
                               progress=False, workers_write=True)
                dasks.append(time.perf_counter() - t)
                print(f"  Dask run {k + 1}: {dasks[-1]:.1f} s, {s2.n_done} done; {_load()}")
            rss_workers = client.run(_maxrss_mb)
        t_dask = min(dasks)
        speed = t_single / t_dask
        print(f"Dask, {args.workers} workers: {t_dask:.1f} s ({args.stars / t_dask:.0f} "
              f"stars/s; cluster start and warm-up {t_start:.1f} s not counted); "
              f"speed-up {speed:.2f}x")
        print("peak RSS per worker: " + ", ".join(f"{v:.0f} MB" for v in
                                                  rss_workers.values()))
        a = pd.concat([pd.read_parquet(f)
                       for f in sorted((work / "single0" / "parts").glob("part-*"))])
        b = pd.concat([pd.read_parquet(f)
                       for f in sorted((work / "dask0" / "parts").glob("part-*"))])
        same = a.reset_index(drop=True).equals(b.reset_index(drop=True))
        print(f"identical results: {same}")
        peak = max([rss_single, *rss_workers.values()])
        print(f"goals: single < 30 s: {t_single < 30}; speed-up >= 1.6x: {speed >= 1.6}; "
              f"peak memory < 4 GB: {peak < 4096}")
        return 0 if same else 1
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
