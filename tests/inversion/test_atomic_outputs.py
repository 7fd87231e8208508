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
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

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
                             stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
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
