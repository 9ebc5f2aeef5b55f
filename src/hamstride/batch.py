"""Squad runs: discover the folder layout, analyse every trial in a process pool, cache, export, flag.

Folder layout (design.md): ROOT/athletes.csv; ROOT/<athlete>/<session>/*.c3d (sessions sort by a YYYY-MM-DD prefix);
an optional static*.c3d per session. A failing trial never stops the run: it is recorded with its code and reason.
Results are cached per trial by file hash + configuration + software version, so a rerun only analyses what changed.
Every output file is written atomically (temporary file in the same folder, then rename).
"""
from __future__ import annotations

import concurrent.futures as cf
import csv
import datetime as dt
import functools
import hashlib
import io as _io
import json
import os
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Callable, Mapping

import numpy as np
import pandas as pd

from . import __version__
from .errors import ConfigError, HamstrideError
from .io import atomic_open, atomic_write_bytes, atomic_write_text
from .metrics import compute_flags, summarise
from .pipeline import CURVE_COLUMNS, STRIDE_COLUMNS, AnalysisOptions, AthleteInfo, analyse_trial
from .settings import RunConfig, config_toml, load_config  # noqa: F401  (load_config: public via batch too)
from .settings import jsonable as _jsonable
from .squadinput import ATHLETE_COLUMNS, SquadLayout, check_marker_map, read_athletes, scan_squad  # noqa: F401
from .squadinput import match_athlete, session_date  # noqa: F401

CACHE_DIR = ".hamstride-cache"


# --------------------------------------------------------------------------------------------- atomic files

def remove_stale_partials(out: Path) -> int:
    """Delete the temporary files (``.NAME.*.partial``, see io.atomic_path) a killed run left under ``out``.

    Only one run may write into an output folder at a time (a second run would delete the first one's temporaries).
    Returns how many files were removed.
    """
    removed = 0
    for tmp in Path(out).rglob(".*.partial*"):
        try:
            tmp.unlink()
            removed += 1
        except OSError:
            pass
    return removed


def table_csv(df: pd.DataFrame) -> str:
    """CSV text of a table: one header row, UTF-8, fixed float format so reruns are byte-identical.

    The same text as ``df.to_csv(index=False, lineterminator="\n", float_format="%.6g")``, written about three
    times faster: each column is formatted as a whole (floats with ``%.6g``, missing values empty) and the rows go
    through the same ``csv`` writer pandas uses (minimal quoting). Tables with other kinds of columns take pandas.
    """
    text = _io.StringIO()
    _write_csv(df, text)
    return text.getvalue()


def columns_csv(columns: Mapping[str, np.ndarray]) -> str:
    """``table_csv`` of the table these columns make (in their order), without building it: the same text."""
    text = _io.StringIO()
    n_rows = len(next(iter(columns.values()))) if columns else 0
    _write_blocks(list(columns), n_rows, text,
                  lambda lo, hi: [_csv_cells(np.asarray(values[lo:hi])) for values in columns.values()],
                  lambda lo, hi: pd.DataFrame({name: values[lo:hi] for name, values in columns.items()}))
    return text.getvalue()


_PANDAS_CSV = {"index": False, "lineterminator": "\n", "float_format": "%.6g"}


def _write_csv(df: pd.DataFrame, handle) -> None:
    """``table_csv`` into an open text file, block by block (the formatted cells of a block are many small
    objects; the whole table's text is never held in memory)."""
    if not df.columns.is_unique:
        handle.write(df.to_csv(**_PANDAS_CSV))
        return
    def cells_of(lo, hi):
        block = df.iloc[lo:hi]
        return [_csv_cells(block[name].to_numpy()) for name in df.columns]

    _write_blocks(list(df.columns), len(df), handle, cells_of, lambda lo, hi: df.iloc[lo:hi])


def _write_blocks(names: list, n_rows: int, handle, cells_of: Callable, table_of: Callable) -> None:
    """The CSV header, then the rows block by block: each block's cells from ``cells_of(lo, hi)`` (one list per
    column), or, when a column holds cells of a kind not handled here, pandas' text of ``table_of(lo, hi)``."""
    writer = csv.writer(handle, lineterminator="\n")
    writer.writerow([str(name) for name in names])
    for lo in range(0, n_rows, _CSV_ROWS):
        hi = lo + _CSV_ROWS
        cells = cells_of(lo, hi)
        if any(c is None for c in cells):
            handle.write(table_of(lo, hi).to_csv(header=False, **_PANDAS_CSV))
        else:
            writer.writerows(zip(*cells))


_CSV_ROWS = 2048


def _csv_cells(values: np.ndarray) -> list[str] | None:
    """One column's cells as pandas' to_csv writes them, or None when the column is of a kind not handled here."""
    kind = values.dtype.kind
    if kind == "f":
        return ["%.6g" % v if v == v else "" for v in values.tolist()]
    if kind in "iu":
        return [str(v) for v in values.tolist()]
    if kind == "b":
        return ["True" if v else "False" for v in values.tolist()]
    if kind in "OUT":  # object or string columns: text, with missing values empty
        cells = []
        for v in values.tolist():
            if isinstance(v, str):
                cells.append(v)
            elif v is None or (isinstance(v, float) and v != v):
                cells.append("")
            else:
                return None  # numbers or other objects inside a text column: let pandas decide
        return cells
    return None


def write_table(out: Path, name: str, df: pd.DataFrame) -> list[Path]:
    with atomic_open(out / f"{name}.csv", "w", encoding="utf-8", newline="") as fh:
        _write_csv(df, fh)
    paths = [out / f"{name}.csv"]
    try:
        import pyarrow  # noqa: F401
    except ImportError:
        return paths
    buffer = _io.BytesIO()
    df.to_parquet(buffer, index=False)
    paths.append(atomic_write_bytes(out / f"{name}.parquet", buffer.getvalue()))
    return paths


# --------------------------------------------------------------------------------------------- configuration
# The configuration's keys, checks and listing live in settings.py (one table for all three).

default_config_toml = config_toml


# --------------------------------------------------------------------------------------------- discovery

@dataclass(frozen=True)
class TrialJob:
    path: str
    athlete: str
    session: str
    static_path: str | None
    info: AthleteInfo
    markers: str | None = None


def discover_squad(root: str | Path, markers: str | Path | None = None, *, allow_unlisted: bool = False,
                   exclude: tuple[str | Path, ...] = ()) -> tuple[SquadLayout, list[TrialJob]]:
    """The checked squad layout (squadinput.scan_squad: athletes.csv, sessions, skipped files, warnings) and one
    job per sprint trial (static*.c3d are calibration trials). Raises ConfigError on a usage error."""
    layout = scan_squad(root, allow_unlisted=allow_unlisted, exclude=exclude)
    by_code = {r["athlete"]: r for _, r in layout.athletes.iterrows()}
    jobs: list[TrialJob] = []
    for s in layout.sessions:
        row = by_code.get(s.athlete)
        info = AthleteInfo(athlete=s.athlete, session=s.session,
                           body_mass_kg=_float(row["body_mass_kg"]) if row is not None else None,
                           height_m=_float(row["height_m"]) if row is not None else None,
                           sex=row["sex"] if row is not None else "male",
                           strength_factor=_float(row["strength_factor"]) or 1.0 if row is not None else 1.0)
        static = str(s.statics[0]) if s.statics else None
        jobs.extend(TrialJob(str(trial), s.athlete, s.session, static, info, str(markers) if markers else None)
                    for trial in s.trials)
    return layout, jobs


def _float(value) -> float | None:
    try:
        f = float(value)
    except (TypeError, ValueError):
        return None
    return f if np.isfinite(f) and f > 0 else None


# --------------------------------------------------------------------------------------------- running

def file_sha256(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


@functools.lru_cache(maxsize=1)
def code_fingerprint() -> str:
    """Hash of the analysis code itself, so a cache never outlives a change of the model (even within a version)."""
    h = hashlib.sha256()
    for path in sorted(Path(__file__).parent.glob("*.py")):
        if path.name not in ("style.py", "cli.py"):  # presentation only: does not change the cached tables
            h.update(path.name.encode())
            h.update(path.read_bytes())
    return h.hexdigest()[:16]


def _cache_key(job: TrialJob, config: RunConfig, sha: str, static_sha: str | None, markers_sha: str | None) -> str:
    payload = json.dumps({"sha": sha, "static": static_sha, "markers": markers_sha, "version": __version__,
                          "code": code_fingerprint(),
                          "analysis": _jsonable(asdict(config.analysis)), "athlete": _jsonable(asdict(job.info))},
                         sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()[:32]


def _analyse_job(job: TrialJob, options: AnalysisOptions) -> dict:
    """Worker: analyse one trial; never raises (errors become a failure record)."""
    try:
        result = analyse_trial(job.path, options, athlete=job.info, static_path=job.static_path, markers=job.markers)
        return {"status": "ok", "strides": columns_csv(result.tables["strides"]),
                "curves": columns_csv(result.tables["curves"]),
                "info": _jsonable(dict(result.info))}
    except HamstrideError as exc:
        return {"status": "failed", "code": exc.code, "reason": exc.message}
    except Exception as exc:  # an unexpected bug must not stop the squad; record it plainly
        return {"status": "failed", "code": "internal_error",
                "reason": f"trial {Path(job.path).name}: unexpected {type(exc).__name__}: {exc}"}


@dataclass
class SquadRun:
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


def _load_stages() -> None:
    """Import every pipeline stage (and scipy's parts they use) in this process."""
    import importlib

    for stage in ("angles", "checks", "dynamics", "events", "io", "landmarks", "muscles", "segments", "signal",
                  "strides"):
        importlib.import_module(f"{__package__}.{stage}")


def _write_cache_entry(cache: Path, key: str, result: dict) -> None:
    """A trial's cache entry: its tables, then the record (whose presence marks the entry complete)."""
    if result["status"] == "ok":
        atomic_write_text(cache / f"{key}.strides.csv", result["strides"])
        atomic_write_text(cache / f"{key}.curves.csv", result["curves"])
    meta = {k: v for k, v in result.items() if k not in ("strides", "curves")}
    atomic_write_text(cache / f"{key}.json", json.dumps(meta, sort_keys=True, indent=1))


def _analyse_job_into_cache(job: TrialJob, options: AnalysisOptions, cache: Path, key: str) -> dict:
    """Local-pool worker: analyse one trial and write its cache entry itself, so the curves never cross the pipe
    and the writes run in parallel; returns the record and the strides text, marked as already cached."""
    result = _analyse_job(job, options)
    _write_cache_entry(cache, key, result)
    return {k: v for k, v in result.items() if k != "curves"} | {"cached_by_worker": True}


def _run_pool(todo: list[tuple[TrialJob, str]], options: AnalysisOptions, jobs: int,
              on_done: Callable[[TrialJob, str, dict], None], cache: Path, cluster=None) -> None:
    """Run jobs in a process pool (or on a Dask cluster); a worker that dies (native crash) becomes a failed-trial record.
    Local workers write their trial's entry under ``cache`` themselves; cluster results are written by ``on_done``."""
    if not todo:
        return
    if cluster is not None:
        run_on_cluster(todo, options, cluster, on_done)
        return
    # Even with one job the trials run in a worker process: a native crash must never take the squad run down.
    _load_stages()  # forked workers inherit the loaded modules instead of each importing them again
    pending = list(todo)
    while pending:
        crashed: list[tuple[TrialJob, str]] = []
        with cf.ProcessPoolExecutor(max_workers=min(jobs, len(pending)), initializer=tune_allocator) as pool:
            futures = {pool.submit(_analyse_job_into_cache, job, options, cache, key): (job, key)
                       for job, key in pending}
            for future in cf.as_completed(futures):
                job, key = futures.pop(future)  # drop the finished result: memory stays flat
                try:
                    on_done(job, key, future.result())
                except cf.process.BrokenProcessPool:
                    crashed.append((job, key))
        if not crashed:
            break
        # Retry the trials caught in a crashed pool one at a time, so only the real culprit fails.
        pending = []
        for job, key in crashed:
            with cf.ProcessPoolExecutor(max_workers=1, initializer=tune_allocator) as single:
                try:
                    on_done(job, key, single.submit(_analyse_job, job, options).result())
                except cf.process.BrokenProcessPool:
                    on_done(job, key, {"status": "failed", "code": "reader_crash",
                                       "reason": f"trial {Path(job.path).name}: the C3D reader crashed on this file; "
                                                 "it is probably corrupt; re-export it from the capture software"})


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
    :func:`run_on_cluster`.

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
        key = _cache_key(job, config, sha, static_sha, markers_sha)
        records[job.path] = {"file": _rel(job.path, root), "athlete": job.athlete, "session": job.session,
                             "sha256": sha, "static_file": _rel(job.static_path, root) if job.static_path else None,
                             "cache_key": key}
        if (cache / f"{key}.json").exists():
            n_cached += 1
        else:
            todo.append((job, key))
    done = [n_cached + len(unreadable)]
    failures = [len(unreadable)]
    total = len(all_jobs)
    if progress:
        progress(done[0], total, failures[0])

    gathered = _StridesGatherer()  # strides texts parsed in chunks while the workers run (the parent is idle then)

    def on_done(job: TrialJob, key: str, result: dict) -> None:
        if not result.pop("cached_by_worker", False):
            _write_cache_entry(cache, key, result)
        if result["status"] == "ok":
            gathered.add(key, result["strides"])  # the same text as the cache file
        else:
            failures[0] += 1
        done[0] += 1
        if progress:
            progress(done[0], total, failures[0])

    _run_pool(todo, config.analysis, jobs, on_done, cache, cluster=cluster)

    failed = []
    curve_files: list[Path] = []
    curve_files_by_athlete: dict[str, list[Path]] = {}
    for job in all_jobs:
        rec = records[job.path]
        meta = unreadable.get(job.path) or json.loads((cache / f"{rec['cache_key']}.json").read_text(encoding="utf-8"))
        rec["status"] = meta["status"]
        if meta["status"] == "ok":
            rec["reason"] = ""
            rec["warnings"] = meta.get("info", {}).get("warnings", [])
            rec["warning_codes"] = meta.get("info", {}).get("warning_codes", [])
            rec["cutoff_hz"] = meta.get("info", {}).get("cutoff_hz")
            rec["speed_m_s"] = meta.get("info", {}).get("speed_m_s")
            rec["n_strides"] = meta.get("info", {}).get("n_strides")
            # the analysed window (overground capture volume) and the landmarks rebuilt from the static trial
            for name in ("window_start_s", "window_end_s", "window_duration_s", "rebuilt_landmarks"):
                rec[name] = meta.get("info", {}).get(name)
            key = rec["cache_key"]
            if key not in gathered:
                gathered.add(key, (cache / f"{key}.strides.csv").read_text(encoding="utf-8"))
            curve_files.append(cache / f"{rec['cache_key']}.curves.csv")
            curve_files_by_athlete.setdefault(job.athlete, []).append(curve_files[-1])
        else:
            rec["code"] = meta.get("code", "error")
            rec["reason"] = meta.get("reason", "")
            failed.append(rec)
    stride_tables = gathered.tables()  # in no particular order: the sort just below fixes it
    strides = pd.concat(stride_tables, ignore_index=True) if stride_tables else pd.DataFrame(columns=STRIDE_COLUMNS)
    del stride_tables, gathered  # one copy of the rows from here on
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
    _stream_curves(out / "curves.csv", curve_files)
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
    from .report import athlete_files
    stems = athlete_files(sorted(curve_files_by_athlete))
    for athlete, files in curve_files_by_athlete.items():  # athletes/CODE_curves.csv: the rows of curves.csv
        _stream_curves(out / "athletes" / f"{stems[athlete]}_curves.csv", files)
    if report:
        from .report import render_squad
        run_info = {"version": __version__, "configuration": config.as_dict(), "failed": failed,
                    "tendon_note": _tendon_note(), "report_jobs": jobs}  # athlete pages render in parallel too
        # Curves are loaded one athlete at a time while the pages render, so memory does not grow with the squad.
        curves_of = functools.partial(_athlete_curves, curve_files_by_athlete)
        timelines = {a: build_timeline(run, a) for a in sorted(curve_files_by_athlete)
                     if summary.loc[summary["athlete"] == a, "session"].nunique() >= 2}
        run.report_paths = render_squad(out, strides, curves_of, flags, summary, athletes, run_info,
                                        timelines=timelines, progress=report_progress)
    return run


def _read_table(source) -> pd.DataFrame:
    """A strides or curves table from CSV (a file or text): athlete, session and trial codes stay text."""
    return pd.read_csv(source, dtype={"athlete": str, "session": str, "trial": str})


class _StridesGatherer:
    """Trials' strides CSV texts, parsed a chunk at a time with one read (per-call overhead dominates a small
    table) and kept as a few tables (a small table costs far more memory than its rows)."""

    CHUNK = 64

    def __init__(self) -> None:
        self._keys: set[str] = set()
        self._texts: list[str] = []
        self._tables: list[pd.DataFrame] = []

    def __contains__(self, key: str) -> bool:
        return key in self._keys

    def add(self, key: str, text: str) -> None:
        self._keys.add(key)
        self._texts.append(text if text.endswith("\n") else text + "\n")
        if len(self._texts) >= self.CHUNK:
            self._parse()

    def tables(self) -> list[pd.DataFrame]:
        self._parse()
        return self._tables

    def _parse(self) -> None:
        if not self._texts:
            return
        header = self._texts[0].split("\n", 1)[0] + "\n"
        if all(t.startswith(header) for t in self._texts):  # one table: drop the repeated header lines
            self._tables.append(_read_table(_io.StringIO(header + "".join(t[len(header):] for t in self._texts))))
        else:  # written by different versions: each on its own
            self._tables.extend(_read_table(_io.StringIO(t)) for t in self._texts)
        self._texts.clear()


def _tendon_note() -> str:
    try:
        from .muscles import TENDON_SLACK_NOTE
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


def _stream_curves(target: Path, files: list[Path]) -> None:
    """Concatenate per-trial curve CSVs into one file without holding them in memory, atomically."""
    with atomic_open(target) as fh:
        fh.write((",".join(CURVE_COLUMNS) + "\n").encode())
        for path in files:
            with open(path, "rb") as src:
                src.readline()
                for chunk in iter(lambda: src.read(1 << 20), b""):
                    fh.write(chunk)


def _athlete_curves(files_by_athlete: Mapping[str, list[Path]], athlete: str) -> pd.DataFrame:
    return _read_curves(files_by_athlete.get(athlete, []))


def _read_curves(files: list[Path]) -> pd.DataFrame:
    frames = [_read_table(p) for p in files]
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=CURVE_COLUMNS)


# --------------------------------------------------------------------------------------------- timeline

def build_timeline(run: SquadRun, athlete: str) -> pd.DataFrame:
    """Sessions of one athlete in date order: speed, peak strain, l/l_opt, negative work per side, LSI, days since injury."""
    summary = run.summary[run.summary["athlete"] == athlete].copy()
    if summary.empty:
        return summary
    summary["date"] = [str(session_date(s) or "") for s in summary["session"]]
    injury = None
    row = run.athletes[run.athletes["athlete"] == athlete]
    if not row.empty and isinstance(row.iloc[0].get("injury_date"), str):
        try:
            injury = dt.date.fromisoformat(row.iloc[0]["injury_date"].strip())
        except ValueError:
            injury = None
    summary["days_since_injury"] = [((session_date(s) - injury).days if injury and session_date(s) else np.nan)
                                    for s in summary["session"]]
    cols = ["athlete", "session", "date", "days_since_injury", "side", "muscle", "n_strides", "speed_m_s",
            "peak_strain_pct_mean", "peak_strain_pct_sd", "peak_fibre_length_lopt_mean", "negative_work_j_mean",
            "peak_strain_symmetry_index_pct", "peak_strain_lsi_pct", "negative_work_lsi_pct"]
    summary = summary.sort_values(["date", "session", "muscle", "side"], kind="stable")
    return summary[[c for c in cols if c in summary.columns]].reset_index(drop=True)


# --------------------------------------------------------------------------------------------- Dask cluster

CLUSTER_CONNECT_TIMEOUT_S = 30.0


def _worker_software() -> str:
    """Runs on a cluster worker: the hamstride version it would analyse with."""
    from . import __version__ as worker_version
    return worker_version


_MALLOC_TUNED: bool | None = None  # tune_allocator: not tried yet (None), applied (True) or not available


def tune_allocator() -> bool:
    """Let this process reuse freed memory instead of mapping fresh pages for every large numpy temporary.

    glibc serves blocks above its mmap threshold (128 KiB at start) with fresh pages and returns freed memory above
    its trim threshold to the system, so each analysis page-faults its working set afresh: about 450 faults and
    1-1.5 ms of system time on a 2 s trial, about 10 % of its CPU time (measured with ``resource.getrusage``).
    Dask nannies make it worse (they set MALLOC_TRIM_THRESHOLD_, which freezes the mmap threshold at 128 KiB:
    1.8x the CPU time per trial). Raising the mmap threshold to 32 MiB and the trim threshold to 64 MiB (mallopt
    M_MMAP_THRESHOLD = -3, M_TRIM_THRESHOLD = -1) removes the faults; free memory beyond 64 MiB still goes back to
    the system and peak memory is unchanged. The hamstride command and its workers call this once per process; a
    long notebook session may call it too. Only where glibc is present (returns False elsewhere, changing nothing).
    """
    global _MALLOC_TUNED
    if _MALLOC_TUNED is None:
        try:
            import ctypes

            libc = ctypes.CDLL("libc.so.6")
            _MALLOC_TUNED = bool(libc.mallopt(-3, 32 << 20)) and bool(libc.mallopt(-1, 64 << 20))
        except (OSError, AttributeError):
            _MALLOC_TUNED = False
    return _MALLOC_TUNED


def _analyse_job_on_worker(job: TrialJob, options: AnalysisOptions) -> dict:
    """Cluster task: like the local worker, plus a clear record when the worker host cannot see the file."""
    tune_allocator()
    for label, path in (("trial", job.path), ("static trial", job.static_path), ("marker map", job.markers)):
        if path is not None and not os.path.exists(path):
            import socket
            return {"status": "failed", "code": "not_on_worker",
                    "reason": f"trial {Path(job.path).name}: the {label} {path} is not visible on cluster worker "
                              f"{socket.gethostname()}; the workers must see the squad folder at the same path "
                              "(shared disk)"}
    return _analyse_job(job, options)


def _connect_cluster(cluster):
    """A dask.distributed Client for ``cluster``: a scheduler address (tcp://HOST:PORT), a scheduler file or a Client."""
    try:
        from distributed import Client
    except ImportError:
        raise ConfigError("--cluster needs the optional Dask extra; install it with "
                          "pip install 'hamstride[cluster]' (or run without --cluster on this computer's cores)") from None
    if isinstance(cluster, Client):
        return cluster, False
    target = str(getattr(cluster, "scheduler_address", cluster))
    try:
        if "://" not in target and Path(target).is_file():
            client = Client(scheduler_file=target, timeout=CLUSTER_CONNECT_TIMEOUT_S)
        elif "://" not in target and target.lower().endswith(".json"):
            raise ConfigError(f"scheduler file {target} not found; start the scheduler with "
                              f"`dask scheduler --scheduler-file {target}` first")
        else:
            client = Client(target, timeout=CLUSTER_CONNECT_TIMEOUT_S)
    except ValueError as exc:
        raise ConfigError(f"--cluster expects a scheduler address such as tcp://10.0.0.5:8786 or a scheduler file; "
                          f"{target!r} is neither ({exc})") from None
    except (OSError, TimeoutError) as exc:
        raise ConfigError(f"could not reach the Dask scheduler at {target} within {CLUSTER_CONNECT_TIMEOUT_S:g} s "
                          f"({type(exc).__name__}); check that `dask scheduler` is running and the address/port is "
                          "right, or run without --cluster") from None
    return client, True


def run_on_cluster(todo: list[tuple[TrialJob, str]], options: AnalysisOptions, cluster,
                   on_done: Callable[[TrialJob, str, dict], None]) -> None:
    """Send trials to an existing Dask distributed cluster; results go through ``on_done`` exactly as in the pool.

    ``cluster`` is a scheduler address (``tcp://HOST:PORT``), a scheduler file written by
    ``dask scheduler --scheduler-file FILE``, a ``distributed.Client`` or anything with ``scheduler_address``
    (e.g. a ``LocalCluster``). Workers read the C3D files themselves, so they need the squad folder at the same
    path (shared disk) and the same hamstride version. The analysis code and the CSV text are the ones of the
    local pool, so the tables are byte-identical; caching and the manifest stay on this computer.
    """
    if not todo:
        return
    client, owned = _connect_cluster(cluster)
    try:
        from distributed import KilledWorker, as_completed
        from . import __version__ as local_version

        try:
            client.wait_for_workers(1, timeout=CLUSTER_CONNECT_TIMEOUT_S)
        except TimeoutError:
            raise ConfigError(f"the Dask scheduler at {client.scheduler.address} has no workers; start some with "
                              f"`dask worker {client.scheduler.address}`") from None
        try:
            versions = client.run(_worker_software)
        except Exception as exc:
            raise ConfigError(f"the Dask workers could not load hamstride ({type(exc).__name__}: {exc}); install "
                              "hamstride (same version) in every worker's Python environment") from None
        wrong = sorted({str(v) for v in versions.values()} - {local_version})
        if wrong:
            raise ConfigError(f"cluster workers run hamstride {', '.join(wrong)} but this computer runs "
                              f"{local_version}; install the same version on every worker")
        remote = [replace(job, path=os.path.abspath(job.path),
                          static_path=os.path.abspath(job.static_path) if job.static_path else None,
                          markers=os.path.abspath(job.markers) if job.markers else None) for job, _ in todo]
        keys = [f"hamstride-trial-{i}-{key}" for i, (_, key) in enumerate(todo)]
        futures = client.map(_analyse_job_on_worker, remote, options=options, key=keys, pure=False)
        by_key = {f.key: item for f, item in zip(futures, todo)}
        for future in as_completed(futures):
            job, key = by_key[future.key]
            try:
                result = future.result()
            except KilledWorker:  # workers died on this trial repeatedly: a native crash, as in the local pool
                result = {"status": "failed", "code": "reader_crash",
                          "reason": f"trial {Path(job.path).name}: the C3D reader crashed on this file; "
                                    "it is probably corrupt; re-export it from the capture software"}
            except Exception as exc:  # the cluster went away: do not cache a failure, the trial is not at fault
                raise HamstrideError(f"lost the Dask cluster ({type(exc).__name__}: {exc}); trials finished so far "
                                     "are cached, run the same command again to continue", code="cluster_lost") from None
            on_done(job, key, result)
            future.release()
    finally:
        if owned:
            client.close()
