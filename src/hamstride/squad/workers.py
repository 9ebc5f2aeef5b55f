"""The worker processes of a squad run: the modules they load (:data:`STAGE_MODULES`, loaded once by the process
they fork from) and the memory allocator setting every hamstride process uses (:func:`tune_allocator`, also the
pool's initializer). Light on purpose (no numpy, no stages): the command imports it before anything heavy.
"""
from __future__ import annotations

__all__ = ["STAGE_MODULES", "tune_allocator"]

#: The modules a worker runs (with the parts of scipy they import): loaded once, by the process the workers are
#: forked from.
STAGE_MODULES = tuple(f"hamstride.{stage}" for stage in (
    "angles", "checks", "dynamics", "events", "c3d", "landmarks", "labframe", "muscles", "plates", "segments",
    "signal", "strides", "metrics", "pipeline"))


def _load_stages() -> None:
    """Import every pipeline stage (and scipy's parts they use) in this process."""
    import importlib

    for module in STAGE_MODULES:
        importlib.import_module(module)


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
