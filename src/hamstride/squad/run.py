"""``run_squad``: discover, analyse (cache + executor), build the squad tables, export, report.

Data make one pass: workers return a trial's tables as binary columns into the cache (:mod:`.cache`); the parent
reads the small strides tables from there, and the curves go from the cache to ``curves.csv`` and the athletes'
curves files in one formatting pass (:mod:`.export`); reports read the binary tables too.
"""
from __future__ import annotations

import contextlib
import functools
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Mapping

import pandas as pd

from .. import __version__
from ..atomic import atomic_write_text, remove_stale_partials
from ..metrics import compute_flags, summarise
from ..pipeline import CURVE_COLUMNS, STRIDE_COLUMNS
from ..settings import RunConfig
from ..settings import jsonable as _jsonable
from ..squadinput import check_marker_map, match_athlete
from .cache import CACHE_DIR, cache_key, code_fingerprint, file_sha256, has_entry, read_record, read_table
from .cache import write_entry
from .discovery import TrialJob, discover_squad
from .executor import run_pool
from .export import CurvesExport, exported_frame, write_curves, write_table
from .timeline import build_timeline

__all__ = ["run_squad", "SquadRun"]


@dataclass
class SquadRun:
    """What a squad run produced: the output folder, manifest, squad tables, failures and counts."""

    out: Path
    manifest: dict
    strides: pd.DataFrame
    summary: pd.DataFrame
    flags: pd.DataFrame
    athletes: pd.DataFrame
    failed: list[dict] = field(default_factory=list)
    analysed: int = 0
    cached: int = 0
    report_paths: list[Path] = field(default_factory=list)


def run_squad(root: str | Path, out: str | Path, *, jobs: int | None = None, markers: str | Path | None = None,
              config: RunConfig = RunConfig(), report: bool = True, athlete_filter: str | None = None,
              progress: Callable[[int, int, int], None] | None = None, cluster=None,
              write_outputs: bool = True, allow_unlisted: bool = False,
              report_progress: Callable[[int, int], None] | None = None) -> SquadRun:
    """Analyse a whole squad folder and write the tables, manifest and (optionally) reports under ``out``.

    ``write_outputs=False`` analyses (through the cache under ``out``) and returns the tables without writing the
    squad exports, so a one-athlete view such as the timeline never overwrites the squad's tables.

    ``report_progress(done, total)`` is called once per athlete while the reports are written.

    ``cluster`` (optional): send the trials to an existing Dask cluster instead of local processes; see
    :func:`hamstride.squad.executor.run_on_cluster`.

    Every input is checked before any trial is analysed or any file written (squadinput): a ConfigError means a
    usage error (the command line's exit code 2). Athlete folders not in athletes.csv are skipped (listed in the
    manifest) unless ``allow_unlisted``; ``athlete_filter`` matches a code without regard to letter case."""
    root, out = Path(root), Path(out)
    check_marker_map(markers)  # once, here: a bad map is one usage error, not one failure per trial
    layout, all_jobs = discover_squad(root, markers, allow_unlisted=allow_unlisted, exclude=(out,))
    athletes = layout.athletes
    if athlete_filter is not None:
        athlete_filter = match_athlete(athlete_filter, layout.athlete_codes(), root, athletes["athlete"])
        all_jobs = [j for j in all_jobs if j.athlete == athlete_filter]
    jobs = jobs or os.cpu_count() or 1
    cache = out / CACHE_DIR
    cache.mkdir(parents=True, exist_ok=True)
    remove_stale_partials(out)
    markers_sha = file_sha256(markers) if markers else None
    records: dict[str, dict] = {}
    todo: list[tuple[TrialJob, str]] = []
    static_shas: dict[str, str] = {}
    n_cached = 0
    unreadable: dict[str, dict] = {}
    for job in all_jobs:
        try:
            sha = file_sha256(job.path)
            static_sha = None
            if job.static_path:
                static_sha = static_shas.setdefault(job.static_path, file_sha256(job.static_path))
        except OSError as exc:  # one unreadable file fails its trial, not the squad
            unreadable[job.path] = {"status": "failed", "code": "unreadable",
                                    "reason": f"trial {Path(job.path).name}: {exc.filename} cannot be read "
                                              f"({exc.strerror or exc}); check the file's permissions"}
            records[job.path] = {"file": _rel(job.path, root), "athlete": job.athlete, "session": job.session,
                                 "sha256": None, "static_file": _rel(job.static_path, root) if job.static_path else None,
                                 "cache_key": None}
            continue
        key = cache_key(job, config, sha, static_sha, markers_sha)
        records[job.path] = {"file": _rel(job.path, root), "athlete": job.athlete, "session": job.session,
                             "sha256": sha, "static_file": _rel(job.static_path, root) if job.static_path else None,
                             "cache_key": key}
        if has_entry(cache, key):
            n_cached += 1
        else:
            todo.append((job, key))
    done = [n_cached + len(unreadable)]
    failures = [len(unreadable)]
    total = len(all_jobs)
    if progress:
        progress(done[0], total, failures[0])

    # The curves files are written while the workers run (the parent is idle then): each trial's curves go out, in
    # run order, as soon as it and every trial before it have finished.
    exports = contextlib.ExitStack()
    curves_out = None
    if write_outputs:
        from ..report import athlete_files
        planned_stems = athlete_files(sorted({job.athlete for job in all_jobs}))
        curves_out = CurvesExport(exports, out, CURVE_COLUMNS, planned_stems)
    finished = {key for job in all_jobs if (key := records[job.path]["cache_key"]) and has_entry(cache, key)}
    position = [0]

    def export_ready() -> None:
        while position[0] < len(all_jobs):
            job = all_jobs[position[0]]
            key = records[job.path]["cache_key"]
            if key is not None and key not in finished:
                return
            if curves_out is not None and key is not None and read_record(cache, key)["status"] == "ok":
                curves_out.add(job.athlete, read_table(cache, key, "curves"))
            position[0] += 1

    def on_done(job: TrialJob, key: str, result: dict) -> None:
        if not result.pop("cached_by_worker", False):
            write_entry(cache, key, result)  # cluster results and crash records: written here
        if result["status"] != "ok":
            failures[0] += 1
        done[0] += 1
        finished.add(key)
        export_ready()
        if progress:
            progress(done[0], total, failures[0])

    with exports:
        export_ready()
        run_pool(todo, config.analysis, jobs, on_done, cache, cluster=cluster)
        export_ready()

    failed = []
    ok_keys: list[str] = []
    keys_by_athlete: dict[str, list[str]] = {}
    for job in all_jobs:
        rec = records[job.path]
        meta = unreadable.get(job.path) or read_record(cache, rec["cache_key"])
        rec["status"] = meta["status"]
        if meta["status"] == "ok":
            rec["reason"] = ""
            info = meta.get("info", {})
            rec["warnings"] = info.get("warnings", [])
            rec["warning_codes"] = info.get("warning_codes", [])
            rec["cutoff_hz"] = info.get("cutoff_hz")
            rec["speed_m_s"] = info.get("speed_m_s")
            rec["n_strides"] = info.get("n_strides")
            # the analysed window (overground capture volume) and the landmarks rebuilt from the static trial
            for name in ("window_start_s", "window_end_s", "window_duration_s", "rebuilt_landmarks"):
                rec[name] = info.get(name)
            ok_keys.append(rec["cache_key"])
            keys_by_athlete.setdefault(job.athlete, []).append(rec["cache_key"])
        else:
            rec["code"] = meta.get("code", "error")
            rec["reason"] = meta.get("reason", "")
            failed.append(rec)
    strides = exported_frame([read_table(cache, key, "strides") for key in ok_keys], STRIDE_COLUMNS)
    strides = strides.sort_values(["athlete", "session", "trial", "side", "stride", "muscle"], kind="stable")
    summary = summarise(strides, athletes)
    flags = compute_flags(summary, athletes, config.flags)

    counts = {"trials": total, "ok": total - len(failed), "failed": len(failed),
              "strides": int(strides.drop_duplicates(["athlete", "session", "trial", "side", "stride"]).shape[0])
              if not strides.empty else 0, "flags": int(len(flags))}
    if not write_outputs:
        manifest = {"counts": counts, "inputs": [records[j.path] for j in all_jobs]}
        return SquadRun(out, manifest, strides, summary, flags, athletes, failed, analysed=len(todo), cached=n_cached)
    out.mkdir(parents=True, exist_ok=True)
    write_table(out, "strides", strides)
    stems = athlete_files(sorted(keys_by_athlete))
    renamed = {a for a in keys_by_athlete if stems[a] != planned_stems[a]}
    if renamed:  # athletes whose names differ only in letter case, some without a finished trial: names again
        for a in renamed:
            (out / "athletes" / f"{planned_stems[a]}_curves.csv").unlink(missing_ok=True)
        position = {key: i for i, key in enumerate(ok_keys)}
        write_curves({out / "athletes" / f"{stems[a]}_curves.csv": [position[k] for k in keys_by_athlete[a]]
                      for a in renamed}, CURVE_COLUMNS,
                     ((i, read_table(cache, key, "curves")) for i, key in enumerate(ok_keys)))
    write_table(out, "summary", summary)
    write_table(out, "flags", flags)
    manifest = {
        "software": "hamstride", "version": __version__, "code_fingerprint": code_fingerprint(), "squad": str(root),
        "configuration": config.as_dict(), "markers": str(markers) if markers else None,
        "athletes_csv_sha256": file_sha256(root / "athletes.csv") if (root / "athletes.csv").exists() else None,
        "counts": counts | {"skipped": len(layout.skipped)},
        "inputs": [records[j.path] for j in all_jobs]
        + [{"file": _rel(str(p), root), "status": "skipped", "reason": why} for p, why in layout.skipped],
        "warnings": list(layout.warnings),
    }
    atomic_write_text(out / "manifest.json", json.dumps(_jsonable(manifest), indent=1, sort_keys=False))
    run = SquadRun(out, manifest, strides, summary, flags, athletes, failed, analysed=len(todo), cached=n_cached)
    if report:
        from ..report import render_squad
        run_info = {"version": __version__, "configuration": config.as_dict(), "failed": failed,
                    "tendon_note": _tendon_note(), "report_jobs": jobs}  # athlete pages render in parallel too
        # Curves are loaded one athlete at a time while the pages render, so memory does not grow with the squad.
        curves_of = functools.partial(athlete_curves, cache, keys_by_athlete)
        timelines = {a: build_timeline(run, a) for a in sorted(keys_by_athlete)
                     if summary.loc[summary["athlete"] == a, "session"].nunique() >= 2}
        run.report_paths = render_squad(out, strides, curves_of, flags, summary, athletes, run_info,
                                        timelines=timelines, progress=report_progress)
    return run


def athlete_curves(cache: Path, keys_by_athlete: Mapping[str, list[str]], athlete: str) -> pd.DataFrame:
    """One athlete's curves (every trial's rows, in run order) from the binary cache."""
    tables = [read_table(cache, key, "curves") for key in keys_by_athlete.get(athlete, [])]
    if not tables:
        return pd.DataFrame(columns=CURVE_COLUMNS)
    return pd.concat([pd.DataFrame(t) for t in tables], ignore_index=True)[CURVE_COLUMNS]


def _tendon_note() -> str:
    try:
        from ..muscles import TENDON_SLACK_NOTE
        return TENDON_SLACK_NOTE
    except ImportError:
        return ("Fibre length relative to optimal length (l/l_opt) depends on the model's assumed tendon slack "
                "length; compare within an athlete and squad rather than as an absolute.")


def _rel(path: str | None, root: Path) -> str | None:
    if path is None:
        return None
    try:
        return str(Path(path).relative_to(root))
    except ValueError:
        return str(path)
