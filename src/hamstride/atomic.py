"""Atomic output files: every file hamstride writes appears whole or not at all.

A writer gets a temporary file beside the target (``.NAME.*.partial``) and the finished file is renamed over the
target (``os.replace``, atomic on one file system); a killed run leaves only temporaries, which the next run in
the same output folder removes (:func:`remove_stale_partials`).
"""
from __future__ import annotations

import contextlib
import os
import re
import tempfile
from pathlib import Path

__all__ = ["atomic_path", "atomic_open", "atomic_write_bytes", "atomic_write_text", "remove_stale_partials",
           "safe_name"]


@contextlib.contextmanager
def atomic_path(path: str | Path, suffix: str = ".partial"):
    """Yield a temporary path beside ``path``; on success it replaces ``path`` atomically, on failure it is removed.

    The file gets the usual permissions (0666 less the umask), not the private mode of temporary files.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=suffix, dir=path.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


@contextlib.contextmanager
def atomic_open(path: str | Path, mode: str = "wb", **open_kwargs):
    """Open a temporary file beside ``path`` for writing; when the block ends it is flushed to disk and renamed
    over ``path`` (on failure it is removed, ``path`` untouched). For writers that stream their output."""
    with atomic_path(path) as tmp:
        with open(tmp, mode, **open_kwargs) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())


def atomic_write_bytes(path: str | Path, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder and an atomic rename."""
    with atomic_open(path) as fh:
        fh.write(data)
    return Path(path)


def atomic_write_text(path: str | Path, text: str) -> Path:
    """UTF-8 text version of :func:`atomic_write_bytes`."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def remove_stale_partials(out: Path) -> int:
    """Delete the temporary files (``.NAME.*.partial``, see :func:`atomic_path`) a killed run left under ``out``.

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


def safe_name(text: str) -> str:
    """A file-system-safe version of an athlete/session/trial name (no path separators, no dot-dot)."""
    cleaned = re.sub(r"[^A-Za-z0-9_.-]+", "_", str(text)).strip("._")
    return cleaned or "unnamed"
