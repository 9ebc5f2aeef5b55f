"""Interrupted runs: `hamstride squad` killed with SIGKILL mid-run leaves no half-written output, and rerunning it
completes from the cache with tables byte-identical to an uninterrupted run and no temporary files left.

The squad is a copy of part of the invented demo squad (or, when it has not been generated, a few synthetic
trials). Each run is a separate process group started here, so the kill reaches the pool workers too.
"""
from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

DEMO = Path(__file__).resolve().parents[1] / "demo_trials"
CACHE = ".hamstride-cache"
TABLES = ("strides.csv", "curves.csv", "summary.csv", "flags.csv", "manifest.json")


def _make_squad(root: Path, sessions: int) -> int:
    """Copy `sessions` sessions of the demo squad (two sprints and a static each); returns the number of trials."""
    root.mkdir(parents=True)
    if (DEMO / "athletes.csv").exists():
        shutil.copy(DEMO / "athletes.csv", root / "athletes.csv")
        chosen = sorted(p for p in DEMO.glob("RB12/*") if p.is_dir())[:sessions]  # the returning athlete
        for session in chosen:
            shutil.copytree(session, root / session.parent.name / session.name)
    else:  # pragma: no cover - depends on whether the demo squad is generated
        from hamstride.synth import SprintSpec, write_sprint_trial

        (root / "athletes.csv").write_text("athlete,body_mass_kg,height_m,sex,involved_side,injury_date\n"
                                           "KL01,75,1.80,male,none,\n")
        for k in range(sessions):
            for j in range(2):
                write_sprint_trial(root / "KL01" / f"2026-01-0{k + 1}_s" / f"sprint_{j + 1:02d}.c3d",
                                   SprintSpec(duration_s=1.5, seed=10 * k + j))
    return len([p for p in root.glob("*/*/*.c3d") if not p.name.lower().startswith("static")])


def _command(root: Path, out: Path, report: bool) -> list[str]:
    cmd = [sys.executable, "-m", "hamstride.cli", "squad", str(root), "--out", str(out), "--jobs", "2"]
    return cmd if report else cmd + ["--no-report"]


def _run(root: Path, out: Path, report: bool = False) -> subprocess.CompletedProcess:
    proc = subprocess.run(_command(root, out, report), capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stdout[-1500:] + proc.stderr[-1500:]
    return proc


def _run_in_process(root: Path, out: Path, report: bool = False) -> None:
    """The same squad run through the Python API (saves a process start; the CLI is a thin layer over it)."""
    from hamstride.batch import run_squad

    run = run_squad(root, out, jobs=2, report=report)
    assert not run.failed, run.failed


def _cached(out: Path) -> int:
    return len(list((out / CACHE).glob("*.json"))) if (out / CACHE).is_dir() else 0


def _run_and_kill(root: Path, out: Path, when, report: bool = False, timeout: float = 120.0) -> bool:
    """Start a squad run in its own process group and SIGKILL the whole group as soon as ``when(out)`` holds.
    Returns False when the run finished before the condition was seen (nothing was killed)."""
    log = open(out.parent / f"{out.name}.log", "w+b")
    proc = subprocess.Popen(_command(root, out, report), stdout=log, stderr=subprocess.STDOUT,
                            start_new_session=True)
    deadline = time.monotonic() + timeout
    try:
        while time.monotonic() < deadline:
            if when(out):
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(timeout=30)
                return True
            if proc.poll() is not None:
                log.seek(0)
                assert proc.returncode == 0, log.read().decode(errors="replace")[-2000:]
                return False
            time.sleep(0.02)
        raise AssertionError("the run neither reached the kill point nor finished")
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(timeout=30)
        log.close()


def _partials(out: Path) -> list[Path]:
    return [p for p in out.rglob("*") if ".partial" in p.name]


def _assert_no_half_written(out: Path, clean: Path) -> None:
    """Whatever a killed run left is complete: final tables absent or identical to the clean run's; every cache
    record parses."""
    for name in TABLES:
        if (out / name).exists():
            assert (out / name).read_bytes() == (clean / name).read_bytes(), f"{name} half-written"
    for record in (out / CACHE).glob("*.json"):
        json.loads(record.read_text())
    for table in (out / CACHE).glob("*.csv"):
        assert table.read_bytes() == (clean / CACHE / table.name).read_bytes(), f"{table.name} half-written"


@pytest.fixture(scope="module")
def squad(tmp_path_factory):
    base = tmp_path_factory.mktemp("kill")
    root = base / "squad"
    n_trials = _make_squad(root, sessions=2)
    clean = base / "clean"
    t0 = time.perf_counter()
    _run_in_process(root, clean)
    return root, clean, n_trials, time.perf_counter() - t0


def test_kill_mid_run_then_rerun_equals_clean_run(squad, tmp_path):
    root, clean, n_trials, clean_s = squad
    # Kill 1: while trials are being analysed (at least one finished, not all). Polling every 20 ms can miss the
    # window on a very fast machine, so up to three attempts, each in a fresh folder.
    for attempt in range(3):
        out = tmp_path / f"out{attempt}"
        if _run_and_kill(root, out, lambda o: 1 <= _cached(o) < n_trials):
            break
    else:
        pytest.fail("three runs finished before they could be killed mid-analysis")
    assert 1 <= _cached(out) < n_trials
    _assert_no_half_written(out, clean)
    # Kill 2: the rerun, as soon as every trial is cached (while it writes the squad tables) or later.
    _run_and_kill(root, out, lambda o: _cached(o) == n_trials)
    _assert_no_half_written(out, clean)
    # The last rerun completes from the cache.
    proc = _run(root, out)
    assert f"{n_trials} from cache" in proc.stdout.replace("\n", " ")
    for name in TABLES:
        assert (out / name).read_bytes() == (clean / name).read_bytes(), name
    assert _partials(out) == []
    strides = pd.read_csv(out / "strides.csv")
    assert strides["trial"].nunique() >= 2  # the comparison is about real tables, not two empty files


def test_stale_temporaries_are_removed_by_the_next_run(squad, tmp_path):
    """Temporary files a kill can leave (e.g. inside an atomic write) are cleared by the next run."""
    root, clean, _, _ = squad
    out = tmp_path / "out"
    shutil.copytree(clean, out)
    (out / ".strides.csv.k3j9x.partial").write_text("athlete,sess")
    (out / CACHE / ".0123.json.ab12.partial").write_text("{")
    _run_in_process(root, out)
    assert _partials(out) == []
    assert (out / "strides.csv").read_bytes() == (clean / "strides.csv").read_bytes()


@pytest.mark.slow
def test_kill_at_many_points_with_reports(tmp_path):
    """Reports on, killed at eight different moments in a row (trial analysis, tables, report pages); the final
    rerun equals a clean run, and no temporary file remains."""
    root = tmp_path / "squad"
    n_trials = _make_squad(root, sessions=3)
    clean = tmp_path / "clean"
    _run(root, clean, report=True)
    out = tmp_path / "out"
    for k in range(8):
        start = time.monotonic()
        delay = 0.4 + 0.9 * k
        _run_and_kill(root, out, lambda o, s=start, d=delay: time.monotonic() - s > d, report=True)
        _assert_no_half_written(out, clean)
    _run(root, out, report=True)
    for name in TABLES:
        assert (out / name).read_bytes() == (clean / name).read_bytes(), name
    assert (out / "index.html").exists()
    assert _partials(out) == []
    assert _cached(out) == n_trials
