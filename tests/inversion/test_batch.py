"""Catalogues at scale (inversion/batch.py, `planetmix batch`): bad rows, resume, Dask."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from inversion.batch import read_catalogue, run_batch
from inversion.cli import main
from inversion.exceptions import InputError
from inversion.handoff import summarise
from inversion.star import StarInput, StarSettings, earth_calibrated_pattern, run_star

ELS = ("Fe", "Mg", "Si", "Al", "Ca", "Ni")


@pytest.fixture(scope="module")
def settings() -> StarSettings:
    return StarSettings(pattern=earth_calibrated_pattern(), draws=100, seed=11,
                        planet_mass_kg=5.972e24)


def write_catalogue(path: Path, n: int = 10, bad: bool = True, seed: int = 0) -> Path:
    """n synthetic stars; with ``bad`` five awkward rows are mixed in (n >= 10)."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        r = {"star_id": f"s{i:03d}"}
        for e in ELS:
            r[e] = f"{rng.normal(0.0, 0.15):.3f}"
            r[f"{e}_err"] = f"{rng.uniform(0.03, 0.08):.3f}"
        rows.append(r)
    if bad:
        rows[2]["Mg"] = "n/a?"                     # non-numeric value
        rows[4]["Si_err"] = ""                     # value without uncertainty
        rows[6]["star_id"] = rows[5]["star_id"]    # repeated id
        rows[8]["Al"], rows[8]["Al_err"] = "", ""  # not measured: fine, flagged
        rows[9]["Fe"] = "-1.5"                     # no core possible with 8 wt% FeO
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


def _all_parts(folder: Path) -> pd.DataFrame:
    files = sorted((folder / "parts").glob("part-*.parquet"))
    return pd.concat([pd.read_parquet(f) for f in files], ignore_index=True)


def test_bad_rows_are_recorded_and_the_batch_completes(tmp_path, settings):
    cat = write_catalogue(tmp_path / "cat.csv")
    s = run_batch(cat, tmp_path / "out", settings, partition_size=3, progress=False)
    assert s.complete and s.n_rows == 10
    assert s.n_done == 6 and s.n_failed == 4
    reasons = dict(zip(s.failed["star_id"], s.failed["reason"], strict=True))
    assert "needs more iron" in reasons["s009"]
    assert "not a number" in reasons["s002"]
    assert "missing uncertainty" in reasons["s004"]
    assert "duplicate star_id" in reasons["s005"]
    df = _all_parts(tmp_path / "out")
    assert len(df) == 10 and df["row"].is_unique
    assert "Al" in df.loc[df["star_id"] == "s008", "solar_ratio"].iloc[0]
    ok = df[df["status"] == "ok"]
    assert ok["core_mass_fraction_median"].between(0.1, 0.6).all()
    failed_csv = pd.read_csv(tmp_path / "out" / "failed.csv")
    assert len(failed_csv) == 4


def test_unknown_column_is_a_file_error(tmp_path, capsys):
    cat = write_catalogue(tmp_path / "cat.csv", n=3, bad=False)
    df = pd.read_csv(cat)
    df["Vmag"] = 5.0
    df.to_csv(cat, index=False)
    with pytest.raises(InputError, match="unknown column") as err:
        read_catalogue(cat)
    assert err.value.field == "Vmag"
    assert main(["batch", str(cat), "--out", str(tmp_path / "o"), "--workers", "1"]) == 2
    assert "Vmag" in capsys.readouterr().err


def test_interrupted_then_resumed_equals_uninterrupted(tmp_path, settings):
    cat = write_catalogue(tmp_path / "cat.csv", n=10)
    full = run_batch(cat, tmp_path / "full", settings, partition_size=3, progress=False)
    assert full.complete
    # interrupted after one partition
    part = run_batch(cat, tmp_path / "res", settings, partition_size=3, max_partitions=1,
                     progress=False)
    assert not part.complete and part.partitions_computed == 1
    # killed while writing the next partition: only its temporary file exists
    (tmp_path / "res" / "parts" / ".part-00001.parquet.tmp-12345").write_bytes(b"partial")
    res = run_batch(cat, tmp_path / "res", settings, partition_size=3, resume=True,
                    progress=False)
    assert res.complete and res.partitions_skipped == 1 and res.partitions_computed == 3
    assert not list((tmp_path / "res" / "parts").glob(".part-*"))
    (tmp_path / "res" / "parts" / "part-00002.parquet").unlink()  # a partition lost
    res = run_batch(cat, tmp_path / "res", settings, partition_size=3, resume=True,
                    progress=False)
    assert res.partitions_computed == 1 and res.partitions_skipped == 3
    a, b = _all_parts(tmp_path / "full"), _all_parts(tmp_path / "res")
    assert b["star_id"].tolist() == a["star_id"].tolist()  # one row each, none twice
    pd.testing.assert_frame_equal(a, b)
    assert res.n_done == full.n_done and res.n_failed == full.n_failed


def test_resume_guards(tmp_path, settings):
    cat = write_catalogue(tmp_path / "cat.csv", n=4, bad=False)
    run_batch(cat, tmp_path / "o", settings, partition_size=2, max_partitions=1,
              progress=False)
    with pytest.raises(InputError, match="--resume"):
        run_batch(cat, tmp_path / "o", settings, partition_size=2, progress=False)
    other = StarSettings(pattern=settings.pattern, draws=100, seed=12,
                         planet_mass_kg=settings.planet_mass_kg)
    with pytest.raises(InputError, match="other settings"):
        run_batch(cat, tmp_path / "o", other, partition_size=2, resume=True, progress=False)


def test_dask_equals_single_process(tmp_path, settings):
    from distributed import Client, LocalCluster

    cat = write_catalogue(tmp_path / "cat.csv", n=10)  # 5 partitions: more than in flight
    run_batch(cat, tmp_path / "single", settings, partition_size=2, progress=False)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        s = run_batch(cat, tmp_path / "dask", settings, partition_size=2, client=client,
                      progress=False)
        w = run_batch(cat, tmp_path / "dask_w", settings, partition_size=2, client=client,
                      progress=False, workers_write=True)
        # the command line, sent to the same (existing) cluster by its address
        rc = main(["batch", str(cat), "--out", str(tmp_path / "cli"), "--scheduler",
                   cluster.scheduler_address, "--draws", "100", "--seed", "11",
                   "--planet-mass-kg", "5.972e24", "--partition-size", "2"])
    assert s.complete and w.complete and rc == 0
    single = _all_parts(tmp_path / "single")
    pd.testing.assert_frame_equal(single, _all_parts(tmp_path / "dask_w"), check_exact=True)
    pd.testing.assert_frame_equal(single, _all_parts(tmp_path / "dask"), check_exact=True)
    pd.testing.assert_frame_equal(single, _all_parts(tmp_path / "cli"), check_exact=True)


def test_batch_row_equals_the_single_star_run(tmp_path, settings, monkeypatch):
    import inversion.batch

    monkeypatch.setattr(inversion.batch, "BLOCK_DRAWS", 150)  # blocks of one star
    cat = write_catalogue(tmp_path / "cat.csv", n=4, bad=False)
    run_batch(cat, tmp_path / "o", settings, partition_size=4, progress=False)
    df = _all_parts(tmp_path / "o")
    raw = pd.read_csv(cat).iloc[1]
    star = StarInput(raw["star_id"], {e: float(raw[e]) for e in ELS},
                     {e: float(raw[f"{e}_err"]) for e in ELS})
    d = run_star(star, settings).draws
    row = df[df["star_id"] == raw["star_id"]].iloc[0]
    for stat, v in summarise(d.core_mass_fraction).items():
        assert row[f"core_mass_fraction_{stat}"] == pytest.approx(v, rel=1e-12)
    for stat, v in summarise(d.heat_total_w).items():
        assert row[f"heat_total_W_{stat}"] == pytest.approx(v, rel=1e-12)


def test_batch_command(tmp_path, capsys):
    cat = write_catalogue(tmp_path / "cat.csv", n=10)
    rc = main(["batch", str(cat), "--out", str(tmp_path / "o"), "--workers", "1",
               "--draws", "50", "--partition-size", "3"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "stars done" in out and "not a number" in out
    assert (tmp_path / "o" / "summary.json").exists()
    rc = main(["batch", str(cat), "--out", str(tmp_path / "o"), "--workers", "1",
               "--draws", "50", "--partition-size", "3", "--resume"])
    assert rc == 0
    import json

    summary = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert summary["partitions_skipped"] == 4 and summary["stars_done"] == 6


def test_group_quantiles_equal_numpy_percentiles():
    # The sort-based per-star percentiles against numpy's (linear interpolation), with a
    # NaN (infeasible) draw in one group.
    from inversion.batch import quantiles_by_group
    from inversion.handoff import PERCENTILES

    rng = np.random.default_rng(0)
    v = rng.normal(size=(3 * 101, 4))
    v[5, 2] = np.nan
    q = quantiles_by_group(v, 3)
    for g in range(3):
        expected = np.nanpercentile(v[g * 101:(g + 1) * 101], PERCENTILES, axis=0)
        np.testing.assert_allclose(q[g], expected, rtol=1e-12)
