"""The squad cache: one entry per trial, keyed by the file's hash, the static trial's and the marker map's hashes,
the analysis settings, the athlete's details and the code itself, so a rerun only analyses what changed.

An entry is the trial's tables as binary columns (``KEY.tables.npy``: one numpy structured array per table, a
field per column, text as fixed-width unicode, no pickles; the strides table's array, then the curves table's, one
after the other in one file) and its record ``KEY.json`` (status, reason, analysis info), written last: its presence
marks the entry complete. numpy rather than Arrow/Parquet because numpy is always installed (pyarrow is an optional
extra) and a trial's columns are already numpy arrays; one structured array per table rather than an npz of columns
because reading a zip member per column cost more (1.3 ms for the strides table) than the whole table in one piece;
both tables in one file because every atomic file is flushed to disk (fsync, 2-4 ms here) before it appears.
"""
from __future__ import annotations

import functools
import hashlib
import io as _io
import json
from dataclasses import asdict
from pathlib import Path
from typing import Mapping

import numpy as np

from .. import __version__
from ..atomic import atomic_write_bytes, atomic_write_text
from ..settings import RunConfig
from ..settings import jsonable as _jsonable
from .discovery import TrialJob

__all__ = ["CACHE_DIR", "file_sha256", "code_fingerprint", "cache_key", "write_entry", "read_record",
           "read_table", "has_entry"]

CACHE_DIR = ".hamstride-cache"
_TABLES = ("strides", "curves")


def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes, read in 1 MiB blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


@functools.lru_cache(maxsize=1)
def code_fingerprint() -> str:
    """Hash of the analysis code itself, so a cache never outlives a change of the model (even within a version).

    Every module of the package except the presentation (``report/``, ``style.py``, ``cli.py``)."""
    h = hashlib.sha256()
    package = Path(__file__).resolve().parent.parent
    for path in sorted(package.rglob("*.py")):
        rel = path.relative_to(package).as_posix()
        if rel in ("style.py", "cli.py") or rel.startswith("report/"):
            continue
        h.update(rel.encode())
        h.update(path.read_bytes())
    return h.hexdigest()[:16]


def cache_key(job: TrialJob, config: RunConfig, sha: str, static_sha: str | None, markers_sha: str | None) -> str:
    """The entry's name: a hash of everything that can change the trial's tables."""
    payload = json.dumps({"sha": sha, "static": static_sha, "markers": markers_sha, "version": __version__,
                          "code": code_fingerprint(),
                          "analysis": _jsonable(asdict(config.analysis)), "athlete": _jsonable(asdict(job.info))},
                         sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()[:32]


def _record_array(columns: Mapping[str, np.ndarray]) -> np.ndarray:
    """A table's columns as one numpy structured array (one field per column, in order; text as fixed-width
    unicode, object columns of str/None included), so an entry is written and read in one piece."""
    arrays = []
    for values in columns.values():
        values = np.asarray(values)
        if values.dtype.kind == "O":
            values = np.array(["" if v is None else str(v) for v in values.tolist()], dtype=str)
        arrays.append(values)
    n_rows = len(arrays[0]) if arrays else 0
    table = np.empty(n_rows, dtype=[(name, values.dtype) for name, values in zip(columns, arrays)])
    for name, values in zip(columns, arrays):
        table[name] = values
    return table


def write_entry(cache: Path, key: str, result: Mapping) -> None:
    """A trial's cache entry: its tables as binary columns, then the record (whose presence marks it complete)."""
    if result["status"] == "ok":
        buffer = _io.BytesIO()
        for name in _TABLES:  # one .npy array after the other (read back in the same order)
            np.save(buffer, _record_array(result["tables"][name]), allow_pickle=False)
        atomic_write_bytes(cache / f"{key}.tables.npy", buffer.getvalue())
    meta = {k: v for k, v in result.items() if k not in ("tables", "cached_by_worker")}
    atomic_write_text(cache / f"{key}.json", json.dumps(meta, sort_keys=True, indent=1))


def has_entry(cache: Path, key: str) -> bool:
    return (cache / f"{key}.json").exists()


def read_record(cache: Path, key: str) -> dict:
    return json.loads((cache / f"{key}.json").read_text(encoding="utf-8"))


def read_table(cache: Path, key: str, name: str) -> dict[str, np.ndarray]:
    """One table of an entry (``"strides"`` or ``"curves"``) as columns in export order (the file's arrays are
    read in order up to it: the strides table, first, is small)."""
    with open(cache / f"{key}.tables.npy", "rb") as fh:
        for _ in range(_TABLES.index(name) + 1):
            table = np.lib.format.read_array(fh, allow_pickle=False)
    return {column: table[column] for column in table.dtype.names}
