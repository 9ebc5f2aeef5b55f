"""The worker processes of a squad run: the modules they load (:data:`STAGE_MODULES`), the forkserver they can be
forked from (:func:`start_worker_server`), their initializer and the memory allocator setting every hamstride
process uses (:func:`tune_allocator`). Light on purpose (no numpy, no stages): it can be imported first, so a
server starts loading the stages before the calling process loads anything heavy.
"""
from __future__ import annotations

__all__ = ["STAGE_MODULES", "start_worker_server", "tune_allocator"]

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


def start_worker_server(*also: str) -> None:
    """Start, in the background, the process the pool's workers will be forked from (the ``forkserver`` start
    method), loading the stages there (:data:`STAGE_MODULES`, about 0.5 s, mostly scipy) while this process goes on
    with its own imports, the squad's discovery and the inputs' hashes; pass ``start_method="forkserver"`` to
    :func:`hamstride.squad.executor.run_pool` (or ``run_squad``) to use it. The stages load once (the workers fork
    from the loaded process) and this process never loads scipy. Measured for the command (issue 17, two quiet
    cores): about as fast as forking from the loaded command (one trial 1.09 vs 1.16 s, 24 trials 1.94 vs 1.87 s)
    for 0.15-0.2 s more CPU (a second interpreter), so the command forks; kept for hosts with cores to spare. Workers forked this way do not
    inherit this process's later state (a notebook's changes to a module): the Python API keeps plain ``fork``.

    ``also``: more modules to load there, e.g. the command's own module, which multiprocessing runs again in each
    worker as ``__mp_main__`` (cheap once its imports are loaded)."""
    import multiprocessing
    from multiprocessing import forkserver

    multiprocessing.get_context("forkserver").set_forkserver_preload(list(STAGE_MODULES + also))
    forkserver.ensure_running()


def _start_worker(ignore_warnings: bool = False) -> None:
    """Pool worker initializer: reuse freed memory (:func:`tune_allocator`) and, for workers that did not inherit
    the command's warning filter (forkserver), ignore library warnings as the command does."""
    tune_allocator()
    if ignore_warnings:
        import warnings

        warnings.simplefilter("ignore")


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
