"""Peak memory of a process tree (a squad run and its worker processes), sampled from /proc (Linux).

Two figures per sample, summed over the tree: RSS (counts pages shared by forked workers once per process, so it
overstates) and PSS (shared pages split between the processes that share them, the fair total). Where
/proc/<pid>/smaps_rollup is missing, PSS falls back to RSS.
"""
from __future__ import annotations

import os
import subprocess
import threading
import time
from dataclasses import dataclass
from pathlib import Path


@dataclass(frozen=True)
class MemoryPeak:
    rss_mb: float
    pss_mb: float
    main_rss_mb: float
    wall_s: float
    returncode: int


def _children(pid: int) -> list[int]:
    out: list[int] = []
    task_dir = Path(f"/proc/{pid}/task")
    try:
        for task in task_dir.iterdir():
            try:
                out.extend(int(c) for c in (task / "children").read_text().split())
            except OSError:
                continue
    except OSError:
        pass
    return out


def _tree(pid: int) -> list[int]:
    pids, todo = [], [pid]
    while todo:
        p = todo.pop()
        pids.append(p)
        todo.extend(_children(p))
    return pids


def _kb(path: str, key: str) -> float:
    try:
        with open(path) as fh:
            for line in fh:
                if line.startswith(key):
                    return float(line.split()[1])
    except OSError:
        pass
    return 0.0


def sample(pid: int) -> tuple[float, float, float]:
    """(RSS sum, PSS sum, RSS of ``pid`` alone) in MB over the process tree rooted at ``pid``."""
    rss = pss = main = 0.0
    for p in _tree(pid):
        r = _kb(f"/proc/{p}/status", "VmRSS:")
        s = _kb(f"/proc/{p}/smaps_rollup", "Pss:") if os.path.exists(f"/proc/{p}/smaps_rollup") else r
        rss += r
        pss += s or r
        if p == pid:
            main = r
    return rss / 1024.0, pss / 1024.0, main / 1024.0


def run_and_watch(cmd: list[str], interval_s: float = 0.1, env: dict | None = None) -> MemoryPeak:
    """Run ``cmd`` and return the peak tree memory seen while it ran."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    peak = [0.0, 0.0, 0.0]
    stop = threading.Event()

    def watch() -> None:
        while not stop.is_set():
            values = sample(proc.pid)
            for i, v in enumerate(values):
                peak[i] = max(peak[i], v)
            stop.wait(interval_s)

    thread = threading.Thread(target=watch, daemon=True)
    thread.start()
    _, err = proc.communicate()
    stop.set()
    thread.join()
    if proc.returncode not in (0, 1):
        raise RuntimeError(f"{' '.join(cmd)} failed ({proc.returncode}): {err.decode()[-2000:]}")
    return MemoryPeak(peak[0], peak[1], peak[2], time.perf_counter() - start, proc.returncode)
