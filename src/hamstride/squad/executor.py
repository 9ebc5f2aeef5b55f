"""Where the trials run: a local process pool (started once per run; even one job runs in a worker process, so a
native crash never takes the squad down) or an existing Dask cluster. Either way each trial becomes a record
(``status`` ok with its tables as columns, or failed with a code and reason); a bad trial never stops the squad.
"""
from __future__ import annotations

import concurrent.futures as cf
import os
from dataclasses import replace
from pathlib import Path
from typing import Callable

from ..errors import ConfigError, HamstrideError
from ..pipeline import AnalysisOptions, analyse_trial
from ..settings import jsonable as _jsonable
from .cache import has_entry, read_record, write_entry
from .discovery import TrialJob
from .workers import STAGE_MODULES, _load_stages, tune_allocator

__all__ = ["run_pool", "session_chunks", "run_on_cluster", "tune_allocator", "STAGE_MODULES",
           "CLUSTER_CONNECT_TIMEOUT_S"]


def _analyse_job(job: TrialJob, options: AnalysisOptions) -> dict:
    """Worker: analyse one trial; never raises (errors become a failure record)."""
    try:
        result = analyse_trial(job.path, options, athlete=job.info, static_path=job.static_path, markers=job.markers)
        return {"status": "ok", "tables": {name: dict(result.tables[name]) for name in ("strides", "curves")},
                "info": _jsonable(dict(result.info))}
    except HamstrideError as exc:
        return {"status": "failed", "code": exc.code, "reason": exc.message}
    except Exception as exc:  # an unexpected bug must not stop the squad; record it plainly
        return {"status": "failed", "code": "internal_error",
                "reason": f"trial {Path(job.path).name}: unexpected {type(exc).__name__}: {exc}"}


def _analyse_job_into_cache(job: TrialJob, options: AnalysisOptions, cache: Path, key: str) -> dict:
    """Local-pool worker: analyse one trial and write its cache entry itself, so the curves never cross the pipe
    and the writes run in parallel; returns the record without the tables, marked as already cached."""
    result = _analyse_job(job, options)
    write_entry(cache, key, result)
    return {k: v for k, v in result.items() if k != "tables"} | {"cached_by_worker": True}


def _analyse_jobs_into_cache(items: list[tuple[TrialJob, str]], options: AnalysisOptions, cache: Path) -> list[dict]:
    """Local-pool worker: :func:`_analyse_job_into_cache` for each trial of a chunk, in order."""
    return [_analyse_job_into_cache(job, options, cache, key) for job, key in items]


def session_chunks(todo: list[tuple[TrialJob, str]], workers: int) -> list[list[tuple[TrialJob, str]]]:
    """The pool's tasks: consecutive trials of one session with a static trial go together (the worker that takes
    them calibrates that session once: ``pipeline.static_calibration`` keeps it per process, and with single
    trials two workers each calibrated most sessions), in chunks no larger than the remaining trials / (2 x
    workers), so the chunks shrink towards the end and the workers finish together (guided scheduling, common
    practice). One worker, or trials without a static trial: one trial per task. The chunks keep ``todo``'s order."""
    if workers <= 1:
        return [[item] for item in todo]
    chunks: list[list[tuple[TrialJob, str]]] = []
    i, n = 0, len(todo)
    while i < n:
        limit = max(1, -(-(n - i) // (2 * workers)))
        first = todo[i][0]
        j = i + 1
        while (first.static_path is not None and j < n and j - i < limit
               and (todo[j][0].athlete, todo[j][0].session, todo[j][0].static_path)
               == (first.athlete, first.session, first.static_path)):
            j += 1
        chunks.append(todo[i:j])
        i = j
    return chunks


def run_pool(todo: list[tuple[TrialJob, str]], options: AnalysisOptions, jobs: int,
              on_done: Callable[[TrialJob, str, dict], None], cache: Path, cluster=None) -> None:
    """Run jobs in a process pool (or on a Dask cluster); a worker that dies (native crash) becomes a failed-trial record.
    Local workers write their trial's entry under ``cache`` themselves; cluster results are written by ``on_done``.
    The workers fork from this process after it loads the stages (they inherit them, and any change made to a
    module before the run)."""
    if not todo:
        return
    if cluster is not None:
        run_on_cluster(todo, options, cluster, on_done)
        return
    # Even with one job the trials run in a worker process: a native crash must never take the squad run down.
    _load_stages()  # forked workers inherit the loaded modules instead of each importing them again

    def new_pool(n_workers: int) -> cf.ProcessPoolExecutor:
        return cf.ProcessPoolExecutor(max_workers=n_workers, initializer=tune_allocator)

    workers = min(jobs, len(todo))
    crashed: list[tuple[TrialJob, str]] = []
    with new_pool(workers) as pool:
        futures = {pool.submit(_analyse_jobs_into_cache, chunk, options, cache): chunk
                   for chunk in session_chunks(todo, workers)}
        for future in cf.as_completed(futures):
            chunk = futures.pop(future)  # drop the finished results: memory stays flat
            try:
                results = future.result()
            except cf.process.BrokenProcessPool:
                crashed.extend(chunk)
                continue
            for (job, key), result in zip(chunk, results):
                on_done(job, key, result)
    # Retry the trials caught in a crashed pool one at a time, so only the real culprit fails; those of a chunk that
    # finished before the crash are in the cache already.
    for job, key in crashed:
        if has_entry(cache, key):
            on_done(job, key, read_record(cache, key) | {"cached_by_worker": True})
            continue
        with new_pool(1) as single:
            try:
                on_done(job, key, single.submit(_analyse_job, job, options).result())
            except cf.process.BrokenProcessPool:
                on_done(job, key, {"status": "failed", "code": "reader_crash",
                                   "reason": f"trial {Path(job.path).name}: the C3D reader crashed on this file; "
                                             "it is probably corrupt; re-export it from the capture software"})


# --------------------------------------------------------------------------------------------- Dask cluster

CLUSTER_CONNECT_TIMEOUT_S = 30.0


def _worker_software() -> str:
    """Runs on a cluster worker: the hamstride version it would analyse with."""
    from .. import __version__ as worker_version
    return worker_version


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
    path (shared disk) and the same hamstride version. The analysis code and the tables are those of the
    local pool (the tables travel as binary columns), so the exports are byte-identical; caching and the manifest
    stay on this computer.
    """
    if not todo:
        return
    client, owned = _connect_cluster(cluster)
    try:
        from distributed import KilledWorker, as_completed
        from .. import __version__ as local_version

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
