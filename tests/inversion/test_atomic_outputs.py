"""Atomic result folders: a failure, a Ctrl-C or a kill -9 at any moment leaves either
the previous complete result or nothing, never a partial or mixed folder, and a rerun
succeeds and clears what the killed run left.

The kill tests run the real command line in a subprocess and send SIGKILL at a random
moment, biased towards the end of the run where the result is put in place.
"""

from __future__ import annotations

import json
import os
import random
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from inversion.cli import main
from inversion.exceptions import InputError
from inversion.output import RESULT_MARK, atomic_folder, clean_stale

TEMPLATES = Path(__file__).resolve().parents[2] / "inversion" / "templates"
FIT_FILES = {"fit.json", "residuals.csv", "planet.csv", "planet.json", "planet_draws.csv",
             RESULT_MARK}
RUN = "import sys; from inversion.cli import main; sys.exit(main())"


# --------------------------------------------------------------------------- unit level
def test_success_replaces_the_whole_folder(tmp_path: Path) -> None:
    out = tmp_path / "r"
    with atomic_folder(out) as tmp:
        (tmp / "a.txt").write_text("1")
        (tmp / "old_only.txt").write_text("1")
    with atomic_folder(out) as tmp:
        (tmp / "a.txt").write_text("2")
    # a file of the earlier result that the new run does not write is gone: never mixed
    assert sorted(p.name for p in out.iterdir()) == sorted([RESULT_MARK, "a.txt"])
    assert (out / "a.txt").read_text() == "2"
    assert [p.name for p in tmp_path.iterdir()] == ["r"]


@pytest.mark.parametrize("exc", [RuntimeError, KeyboardInterrupt])
def test_failure_keeps_the_previous_result(tmp_path: Path, exc: type[BaseException]) -> None:
    out = tmp_path / "r"
    with atomic_folder(out) as tmp:
        (tmp / "a.txt").write_text("1")
    with pytest.raises(exc), atomic_folder(out) as tmp:
        (tmp / "a.txt").write_text("2")
        (tmp / "b.txt").write_text("2")
        raise exc()
    assert (out / "a.txt").read_text() == "1" and not (out / "b.txt").exists()
    assert [p.name for p in tmp_path.iterdir()] == ["r"]


def test_failure_without_earlier_result_leaves_nothing(tmp_path: Path) -> None:
    with pytest.raises(RuntimeError), atomic_folder(tmp_path / "r") as tmp:
        (tmp / "a.txt").write_text("1")
        raise RuntimeError
    assert list(tmp_path.iterdir()) == []


def _dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def test_stale_folders_of_killed_runs_are_cleaned(tmp_path: Path) -> None:
    out = tmp_path / "r"
    out.mkdir()
    (out / "a.txt").write_text("current")
    dead = _dead_pid()
    stale_tmp = tmp_path / f".r.tmp-{dead}-abc123"
    stale_old = tmp_path / f".r.old-{dead}-def456"
    alive_tmp = tmp_path / f".r.tmp-{os.getpid()}-zzz"
    for d in (stale_tmp, stale_old, alive_tmp):
        d.mkdir()
    removed = clean_stale(out)
    assert set(removed) == {stale_tmp, stale_old}
    assert alive_tmp.exists() and (out / "a.txt").read_text() == "current"


def test_killed_between_the_two_renames_restores_the_earlier_result(tmp_path: Path) -> None:
    # the state a kill between "rename old away" and "rename new in" leaves behind
    dead = _dead_pid()
    old = tmp_path / f".r.old-{dead}-abc"
    new = tmp_path / f".r.tmp-{dead}-def"
    old.mkdir()
    new.mkdir()
    (old / "a.txt").write_text("earlier")
    (new / "a.txt").write_text("unfinished")
    clean_stale(tmp_path / "r")
    assert (tmp_path / "r" / "a.txt").read_text() == "earlier"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r"]


def test_out_naming_a_file_or_a_foreign_folder_is_refused_before_any_work(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    f = tmp_path / "file.txt"
    f.write_text("keep")
    # the case file does not even exist: the --out check comes first
    assert main(["fit", str(tmp_path / "missing.toml"), "--out", str(f)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--out" in err and "not a folder" in err
    foreign = tmp_path / "mine"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("keep")
    assert main(["fit", str(tmp_path / "missing.toml"), "--out", str(foreign)]) == 2
    assert "did not write" in capsys.readouterr().err
    assert f.read_text() == "keep" and (foreign / "notes.txt").read_text() == "keep"
    with pytest.raises(InputError):
        with atomic_folder(f):
            pass


def test_negative_seed_is_refused_before_any_output(tmp_path: Path,
                                                    capsys: pytest.CaptureFixture[str]) -> None:
    shutil.copy(TEMPLATES / "catalog.csv", tmp_path / "cat.csv")
    out = tmp_path / "b"
    assert main(["batch", str(tmp_path / "cat.csv"), "--out", str(out), "--seed", "-1"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("planetmix: error:") and err.count("\n") == 1 and "--seed" in err
    assert not out.exists()


def test_argparse_errors_are_one_line_with_the_project_prefix(
        capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["fit", "x.toml"]) == 2  # --out missing
    err = capsys.readouterr().err
    assert err.startswith("planetmix: error:") and err.count("\n") == 1
    assert main(["star", "s.csv", "--out", "o", "--draws", "many"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("planetmix: error:") and "--draws" in err and err.count("\n") == 1


def test_closed_pipe_is_silent(tmp_path: Path) -> None:
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    p = subprocess.Popen([sys.executable, "-c", RUN, "library", "elements"],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)
    p.stdout.read(10)
    p.stdout.close()  # the reader goes away, as with `| head -c 10`
    err = p.stderr.read().decode()
    p.wait(timeout=60)
    assert "Traceback" not in err and "BrokenPipe" not in err


def _ctrl_c_fit(tmp_path: Path, case: Path, delay: float) -> None:
    """Ctrl-C during a fit into a fresh folder: exit 130, one line, nothing left.

    A Ctrl-C while Python itself still imports the package (before ``main`` runs, the
    first ~0.5 s; nothing is written yet) ends with Python's own message: the trial is
    then repeated later in the run. One that lands after ``main`` has returned (the fit
    already done) must find the whole result in place.
    """
    out = tmp_path / "fresh"
    for _ in range(4):
        p = subprocess.Popen([sys.executable, "-c", RUN, "fit", str(case), "--out", str(out)],
                             stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                             preexec_fn=_sigint_default)
        time.sleep(delay)
        p.send_signal(signal.SIGINT)
        err = p.communicate(timeout=120)[1].decode()
        if p.returncode != -signal.SIGINT:
            break
        if out.exists():
            # the signal came after ``main`` returned (interpreter shutdown): the fit
            # finished first, so its folder must be whole
            assert {q.name for q in out.iterdir()} == FIT_FILES
            assert list(tmp_path.glob(".fresh.*")) == []
            shutil.rmtree(out)
            return
        assert list(tmp_path.glob(".fresh.*")) == []
        delay *= 1.5
    if p.returncode == 0:  # the fit finished before the signal: nothing to check
        shutil.rmtree(out)
        return
    assert p.returncode == 130, err
    assert err.count("\n") == 1 and "Traceback" not in err, err
    assert not out.exists() and list(tmp_path.glob(".fresh.*")) == []


# --------------------------------------------------------------------------- kill -9
def _case(folder: Path, title: str) -> Path:
    """The template case with two candidates (a cheaper fit) under another title (the
    title tells the runs apart)."""
    for name in ("target.csv", "component.csv"):
        if not (folder / name).exists():
            shutil.copy(TEMPLATES / name, folder / name)
    text = (TEMPLATES / "case.toml").read_text(encoding="utf-8")
    text = text.replace('candidates = ["CI", "CV", "H", "EH"]', 'candidates = ["CI", "EH"]')
    lines = [ln for ln in text.splitlines() if not ln.startswith("title =")]
    path = folder / f"case_{title}.toml"
    path.write_text(f'title = "run {title}"\n' + "\n".join(lines) + "\n", encoding="utf-8")
    return path


def _fit_folder_state(out: Path) -> str | None:
    """None when ``out`` is absent; else the run title, after checking the folder holds
    exactly one complete fit result."""
    if not out.exists():
        return None
    names = {p.name for p in out.iterdir()}
    assert names == FIT_FILES, names
    title = json.loads((out / "fit.json").read_text())["title"]
    assert json.loads((out / "planet.json").read_text())["title"] == title
    return title


def _run(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", RUN, *args], cwd=cwd, capture_output=True,
                          text=True, timeout=300)


def _kill_at(args: list[str], cwd: Path, delay: float) -> int:
    p = subprocess.Popen([sys.executable, "-c", RUN, *args], cwd=cwd,
                         stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        p.wait(timeout=delay)
    except subprocess.TimeoutExpired:
        p.send_signal(signal.SIGKILL)
        p.wait()
    return p.returncode


def _kill_trials(tmp_path: Path, n_fit: int, n_report: int, seed: int,
                 rerun_report: bool = True) -> dict[str, int]:
    rng = random.Random(seed)
    out = tmp_path / "o"
    cases = {t: _case(tmp_path, t) for t in ("A", "B")}
    t0 = time.perf_counter()
    done = _run(["fit", str(cases["A"]), "--out", "o"], tmp_path)
    duration = time.perf_counter() - t0
    assert done.returncode == 0, done.stderr
    assert _fit_folder_state(out) == "run A"
    _ctrl_c_fit(tmp_path, cases["A"], 0.7 * duration)
    killed = 0
    i = 0
    # the planned trials, then (on a fast or a loaded machine) earlier kills until one
    # run really was killed
    while i < n_fit or (killed == 0 and i < n_fit + 4):
        title = "B" if i % 2 == 0 else "A"
        before = _fit_folder_state(out)
        frac = rng.uniform(0.3, 1.0) if i < n_fit else 0.3 * 0.7 ** (i - n_fit)
        rc = _kill_at(["fit", str(cases[title]), "--out", "o"], tmp_path, frac * duration)
        killed += rc == -signal.SIGKILL
        after = _fit_folder_state(out)  # asserts: complete, one run only
        assert after in (before, f"run {title}")
        i += 1
    # a rerun succeeds and removes what killed runs left beside --out
    done = _run(["fit", str(cases["B"]), "--out", "o"], tmp_path)
    assert done.returncode == 0, done.stderr
    assert _fit_folder_state(out) == "run B"
    assert sorted(p.name for p in tmp_path.glob(".o.*")) == []
    # report: the HTML appears whole or not at all; the result folder is untouched
    t0 = time.perf_counter()
    done = _run(["report", "o", "--out", "report.html"], tmp_path)
    rduration = time.perf_counter() - t0
    assert done.returncode == 0, done.stderr
    for _ in range(n_report):
        (tmp_path / "report.html").unlink(missing_ok=True)
        rc = _kill_at(["report", "o", "--out", "report.html"], tmp_path,
                      rng.uniform(0.3, 1.0) * rduration)
        killed += rc == -signal.SIGKILL
        html = tmp_path / "report.html"
        if html.exists():
            assert html.read_text(encoding="utf-8").rstrip().endswith("</html>")
        assert _fit_folder_state(out) == "run B"
    if rerun_report:
        done = _run(["report", "o", "--out", "report.html"], tmp_path)
        assert done.returncode == 0, done.stderr
        # the rerun removed the temporary files of the killed reports
        assert [p.name for p in tmp_path.glob(".report*")] == []
    return {"killed": killed}


def test_kill_9_during_fit_and_report_leaves_whole_results(tmp_path: Path) -> None:
    res = _kill_trials(tmp_path, n_fit=3, n_report=1, seed=5, rerun_report=False)
    assert res["killed"] >= 1  # at least one run really was killed mid-way


@pytest.mark.slow
def test_kill_9_many_moments(tmp_path: Path) -> None:
    res = _kill_trials(tmp_path, n_fit=20, n_report=8, seed=11)
    assert res["killed"] >= 10


def _rank_folder_state(out: Path) -> str | None:
    """None when ``out`` is absent; else the run title, after checking the folder holds
    exactly one complete ranking."""
    if not out.exists():
        return None
    names = {p.name for p in out.iterdir()}
    assert names == {"ranking.csv", "ranking.json", ".planetmix-result"}, names
    data = json.loads((out / "ranking.json").read_text())
    rows = (out / "ranking.csv").read_text(encoding="utf-8").strip().splitlines()
    assert len(rows) == data["n_hypotheses"] + 1  # header + one row per hypothesis
    return data["title"]


@pytest.mark.slow
def test_kill_9_during_rank_leaves_whole_results(tmp_path: Path) -> None:
    rng = random.Random(3)
    cases = {t: _case(tmp_path, t) for t in ("A", "B")}
    out = tmp_path / "r"
    t0 = time.perf_counter()
    done = _run(["rank", str(cases["A"]), "--out", "r", "--workers", "1"], tmp_path)
    duration = time.perf_counter() - t0
    assert done.returncode == 0, done.stderr
    killed = 0
    for i in range(8):
        title = "B" if i % 2 == 0 else "A"
        before = _rank_folder_state(out)
        rc = _kill_at(["rank", str(cases[title]), "--out", "r", "--workers", "1"], tmp_path,
                      rng.uniform(0.3, 1.0) * duration)
        killed += rc == -signal.SIGKILL
        assert _rank_folder_state(out) in (before, f"run {title}")
    done = _run(["rank", str(cases["B"]), "--out", "r", "--workers", "1"], tmp_path)
    assert done.returncode == 0, done.stderr
    assert _rank_folder_state(out) == "run B"
    assert sorted(p.name for p in tmp_path.glob(".r.*")) == []
    assert killed >= 3


def _sigint_default() -> None:
    """In the child: SIGINT back to its default. A suite started in the background of a
    non-interactive shell (``make test &``) inherits SIGINT ignored, and so would every
    command it starts: the Ctrl-C trials would then test nothing."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)


# --------------------------------------------------------------------------- Ctrl-C early
def _console_script() -> list[str]:
    """The installed ``planetmix`` command (its first module is inversion.entry)."""
    script = Path(sys.executable).parent / "planetmix"
    if script.exists():
        return [str(script)]
    return [sys.executable, "-c", "import sys; from inversion.entry import main; "
            "sys.exit(main())"]


def _startup_only(err: str) -> bool:
    """A Ctrl-C inside the interpreter's own start-up (site, before any planetmix code
    runs): its traceback shows no frame of planetmix's files, or nothing at all."""
    return not re.search(r"/(inversion|components)/[^/]+\.py", err)


def test_ctrl_c_while_the_command_loads_gives_one_line_and_130(tmp_path: Path) -> None:
    """SIGINT at moments spread over the command's loading (numpy, pandas, the solver
    libraries: the first second) and its start: exit 130 with one line, or the finished
    result, never a traceback from planetmix's code."""
    shutil.copy(TEMPLATES / "star_abundances.csv", tmp_path / "s.csv")
    interrupted = 0
    for k, delay in enumerate((0.25, 0.35, 0.5, 0.7, 0.9, 1.2)):
        out = tmp_path / f"o{k}"
        p = subprocess.Popen([*_console_script(), "star", "s.csv", "--out", out.name,
                              "--draws", "20"], cwd=tmp_path, stdout=subprocess.DEVNULL,
                             stderr=subprocess.PIPE, preexec_fn=_sigint_default)
        time.sleep(delay)
        p.send_signal(signal.SIGINT)
        err = p.communicate(timeout=120)[1].decode()
        if p.returncode == 0:
            assert (out / "planet.json").exists()
            continue
        if p.returncode == 130:
            assert err.count("\n") == 1 and err.startswith("planetmix: interrupted"), err
            assert not out.exists() and list(tmp_path.glob(f".{out.name}.*")) == []
            interrupted += 1
            continue
        # only the interpreter's own start-up (tens of ms) is left unhandled
        assert _startup_only(err) and p.returncode in (1, -signal.SIGINT), (delay, err)
    assert interrupted >= 3


# --------------------------------------------------------------------------- batch kill -9
def _catalogue(folder: Path, n: int) -> Path:
    """The template catalogue's rows repeated under new ids (n stars)."""
    lines = (TEMPLATES / "catalog.csv").read_text(encoding="utf-8").splitlines()
    head = [ln for ln in lines if ln.startswith("star_id")][0]
    rows = [ln for ln in lines if ln.startswith("demo-")]
    body = [f"s{i:03d}," + rows[i % len(rows)].split(",", 1)[1] for i in range(n)]
    path = folder / "cat.csv"
    path.write_text(head + "\n" + "\n".join(body) + "\n", encoding="utf-8")
    return path


def _batch_table(out: Path) -> pd.DataFrame:
    """Every partition of a batch folder, read whole (a truncated file fails here)."""
    parts = sorted((out / "parts").glob("part-*.parquet"))
    return pd.concat([pd.read_parquet(f) for f in parts], ignore_index=True) if parts \
        else pd.DataFrame()


def _batch_kill_trials(tmp_path: Path, n_kills: int, seed: int) -> int:
    cat = _catalogue(tmp_path, 24)
    args = ["batch", cat.name, "--workers", "1", "--draws", "30", "--partition-size", "4",
            "--seed", "3"]
    t0 = time.perf_counter()
    done = _run([*args, "--out", "ref"], tmp_path)
    duration = time.perf_counter() - t0
    assert done.returncode == 0, done.stderr
    ref = _batch_table(tmp_path / "ref").sort_values("row").reset_index(drop=True)
    assert len(ref) == 24 and ref["row"].is_unique
    rng = random.Random(seed)
    killed = 0
    out = tmp_path / "b"
    for i in range(n_kills):
        frac = rng.uniform(0.4, 1.0) if i < n_kills - 1 else 0.6
        rc = _kill_at([*args, "--out", "b", "--resume"], tmp_path, frac * duration)
        killed += rc == -signal.SIGKILL
        if out.exists():
            got = _batch_table(out)  # every partition on disk is whole
            assert got.empty or got["row"].is_unique
        if rc == 0 and i < n_kills - 1:
            # the run finished before the kill: start the next trial afresh (a resumed
            # run has less left to do, so later kills would land after its end)
            shutil.rmtree(out)
    done = _run([*args, "--out", "b", "--resume"], tmp_path)
    assert done.returncode == 0, done.stderr
    got = _batch_table(out).sort_values("row").reset_index(drop=True)
    # each star exactly once, and the same numbers as the uninterrupted run
    pd.testing.assert_frame_equal(got, ref)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["complete"] and summary["catalogue_rows"] == 24
    left = [p.name for p in out.rglob("*") if ".tmp-" in p.name]
    assert left == [], left
    return killed


def test_kill_9_during_batch_resumes_to_the_uninterrupted_result(tmp_path: Path) -> None:
    assert _batch_kill_trials(tmp_path, n_kills=1, seed=2) >= 1


@pytest.mark.slow
def test_kill_9_during_batch_many_moments(tmp_path: Path) -> None:
    assert _batch_kill_trials(tmp_path, n_kills=8, seed=19) >= 4


# --------------------------------------------------------------------------- result read back
@pytest.fixture(scope="module")
def star_folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("star")
    shutil.copy(TEMPLATES / "star_abundances.csv", d / "s.csv")
    assert main(["star", str(d / "s.csv"), "--out", str(d / "res"), "--draws", "20"]) == 0
    return d / "res"


@pytest.mark.parametrize("damage", ["iron_split", "star_abundances_dex", "title", "flags",
                                    "provenance", "draws-utf16", "bom"])
def test_damaged_result_folder_gives_one_error_line(star_folder: Path, tmp_path: Path,
                                                    damage: str) -> None:
    """Class: report on a result folder whose files were damaged or edited (a value of
    the wrong kind, a draws table in UTF-16) ended in KeyError/TypeError/
    UnicodeDecodeError tracebacks or read the damaged table; a BOM is accepted."""
    from inversion.report import build_report

    folder = tmp_path / "res"
    shutil.copytree(star_folder, folder)
    pj = folder / "planet.json"
    meta = json.loads(pj.read_text(encoding="utf-8"))
    if damage == "bom":
        pj.write_bytes(b"\xef\xbb\xbf" + pj.read_bytes())
        out = build_report(folder, out=tmp_path / "r.html")
        assert out.read_text(encoding="utf-8").rstrip().endswith("</html>")
        return
    if damage == "draws-utf16":
        draws = folder / "planet_draws.csv"
        draws.write_bytes(draws.read_text(encoding="utf-8").encode("utf-16-le"))
    else:
        # values of the wrong kind (each crashed the report before: AttributeError,
        # TypeError)
        meta[damage] = {"title": 5, "provenance": [1, "y"]}.get(damage, "banana")
        pj.write_text(json.dumps(meta), encoding="utf-8")
    with pytest.raises(InputError) as err:
        build_report(folder, out=tmp_path / "r.html")
    assert str(folder) in str(err.value) and "\n" not in str(err.value)
    assert not (tmp_path / "r.html").exists()
    assert [p.name for p in tmp_path.glob(".r.html*")] == []


def test_atomic_file_replaces_whole_and_cleans_killed_runs(tmp_path: Path) -> None:
    """A killed report's temporary file (older layout ``.report.*.html``, or
    ``.NAME.tmp-PID-*`` of a dead process) is removed by the next write there; a
    failure keeps the earlier file."""
    from inversion.output import atomic_file

    target = tmp_path / "r.html"
    with atomic_file(target) as tmp:
        tmp.write_text("one")
    dead = _dead_pid()
    stale = tmp_path / f".r.html.tmp-{dead}-abc"
    stale.write_text("half")
    legacy = tmp_path / ".report.x1y2.html"
    legacy.write_text("half")
    hour = time.time() - 7200
    os.utime(legacy, (hour, hour))
    live = tmp_path / f".r.html.tmp-{os.getpid()}-zzz"
    live.write_text("being written")
    with pytest.raises(RuntimeError), atomic_file(target) as tmp:
        tmp.write_text("two, half")
        raise RuntimeError
    assert target.read_text() == "one"
    assert not stale.exists() and not legacy.exists() and live.exists()
    live.unlink()
    with atomic_file(target) as tmp:
        tmp.write_text("three")
    assert target.read_text() == "three"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.html"]


# --------------------------------------------------------------------------- sample kill -9
SAMPLE_FILES = {"sample.json", "planet.json", "diagnostics.json", "summary.csv",
                "outliers.csv", "planet_draws.parquet", "posterior.nc", RESULT_MARK}


def _sample_folder_state(out: Path) -> str | None:
    """None when ``out`` is absent; else the run title, after checking the folder holds
    exactly one complete sample result."""
    if not out.exists():
        return None
    names = {p.name for p in out.iterdir()}
    assert names == SAMPLE_FILES, names
    title = json.loads((out / "sample.json").read_text())["title"]
    assert json.loads((out / "planet.json").read_text())["title"] == title
    return title


@pytest.mark.slow
def test_kill_9_during_sample_leaves_whole_results(tmp_path: Path) -> None:
    """SIGKILL at random moments of ``planetmix sample`` (most of its time is the
    sampler's compilation and the chains; the kills are biased to the second half,
    where the result is written and moved into place): the folder holds the earlier
    whole result or the new one, never a mixture, and a rerun succeeds and clears what
    the killed runs left. Short chains: the gate may fail (exit 4), which still writes
    the whole result."""
    rng = random.Random(23)
    cases = {t: _case(tmp_path, t) for t in ("A", "B")}
    args = ["--draws", "20", "--tune", "20", "--chains", "2", "--quiet"]
    out = tmp_path / "s"
    t0 = time.perf_counter()
    done = _run(["sample", str(cases["A"]), "--out", "s", *args], tmp_path)
    duration = time.perf_counter() - t0
    assert done.returncode in (0, 4), done.stderr
    assert _sample_folder_state(out) == "run A"
    killed = 0
    i = 0
    # the planned trials, then (later runs are faster: compiled code is cached) earlier
    # kills until one run really was killed
    while i < 3 or (killed == 0 and i < 6):
        title = "B" if i % 2 == 0 else "A"
        before = _sample_folder_state(out)
        frac = rng.uniform(0.4, 0.95) if i < 3 else 0.3 * 0.7 ** (i - 3)
        rc = _kill_at(["sample", str(cases[title]), "--out", "s", *args], tmp_path,
                      frac * duration)
        killed += rc == -signal.SIGKILL
        assert _sample_folder_state(out) in (before, f"run {title}")
        i += 1
    done = _run(["sample", str(cases["B"]), "--out", "s", *args], tmp_path)
    assert done.returncode in (0, 4), done.stderr
    assert _sample_folder_state(out) == "run B"
    assert sorted(p.name for p in tmp_path.glob(".s.*")) == []
    assert killed >= 1
