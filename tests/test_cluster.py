"""Squad runs on a Dask cluster give the same files as the local pool (issue 8, scale-out).

The reference is the local process pool of hamstride.batch itself: the cluster path must write byte-identical
tables and manifest, reuse the same cache and record the same failures. The cluster is a real
distributed.LocalCluster with worker processes started by the test (needs the optional [cluster] extra).
"""
from __future__ import annotations

import json
import socket
import sys
from pathlib import Path

import pytest

import hamstride
from hamstride import batch
from hamstride.batch import RunConfig, TrialJob, run_on_cluster, run_squad
from hamstride.errors import ConfigError
from hamstride.squad import executor
from hamstride.pipeline import AnalysisOptions, AthleteInfo
from hamstride.synth import SprintSpec, write_sprint_trial

OUTPUTS = ["strides.csv", "curves.csv", "summary.csv", "flags.csv", "manifest.json"]
# Not the defaults, so a worker that ignored the settings would write different tables (and it is quicker).
CONFIG_TOML = "[analysis]\ncutoff_hz = 14.0\nmonte_carlo_samples = 50\n"
CONFIG = RunConfig(AnalysisOptions(cutoff_hz=14.0, monte_carlo_samples=50))


@pytest.fixture(scope="module")
def squad(tmp_path_factory) -> Path:
    """Two invented sprint trials and one corrupt file for one fictional athlete."""
    root = tmp_path_factory.mktemp("cluster_squad")
    session = root / "ZQ01" / "2026-02-03_week1"
    session.mkdir(parents=True)
    (root / "athletes.csv").write_text("athlete,body_mass_kg,height_m,sex,involved_side,injury_date\n"
                                       "ZQ01,72,1.79,male,left,\n", encoding="utf-8")
    write_sprint_trial(session / "sprint_01.c3d", SprintSpec(speed_m_s=8.0, seed=11))
    write_sprint_trial(session / "sprint_02.c3d", SprintSpec(speed_m_s=9.0, seed=12))
    (session / "sprint_03.c3d").write_bytes(b"not a C3D file" * 40)
    return root


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    """A LocalCluster with two single-threaded worker processes; also writes a scheduler file."""
    distributed = pytest.importorskip("distributed")
    scheduler_file = tmp_path_factory.mktemp("dask") / "scheduler.json"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                                  scheduler_kwargs={"scheduler_file": str(scheduler_file)}) as local:
        yield local.scheduler_address, scheduler_file


@pytest.fixture(scope="module")
def local_run(squad, tmp_path_factory):
    out = tmp_path_factory.mktemp("local_out")
    run = run_squad(squad, out, jobs=1, config=CONFIG, report=False)
    return out, run


def _same_files(a: Path, b: Path) -> None:
    for name in OUTPUTS:
        assert (a / name).read_bytes() == (b / name).read_bytes(), f"{name} differs between local pool and cluster"


def test_cluster_writes_byte_identical_files_and_failure_records(squad, cluster, local_run, tmp_path):
    local_out, local = local_run
    # Guard against a vacuous comparison: two trials analysed, the corrupt one recorded as failed.
    assert local.manifest["counts"]["ok"] == 2 and local.manifest["counts"]["failed"] == 1
    assert local.strides.shape[0] > 0
    address, _ = cluster
    run = run_squad(squad, tmp_path, cluster=address, config=CONFIG, report=False)
    assert (run.analysed, run.cached) == (3, 0)
    _same_files(local_out, tmp_path)
    failed = [rec for rec in json.loads((tmp_path / "manifest.json").read_text())["inputs"]
              if rec["status"] == "failed"]
    assert [(rec["file"], rec["code"]) for rec in failed] == [("ZQ01/2026-02-03_week1/sprint_03.c3d",
                                                             local.failed[0]["code"])]
    # Second cluster run: everything comes from the cache the first one wrote.
    again = run_squad(squad, tmp_path, cluster=address, config=CONFIG, report=False)
    assert (again.analysed, again.cached) == (0, 3)
    _same_files(local_out, tmp_path)


def test_cluster_cache_is_shared_with_the_local_pool(squad, cluster, local_run):
    local_out, _ = local_run
    address, _ = cluster
    run = run_squad(squad, local_out, cluster=address, config=CONFIG, report=False)
    assert (run.analysed, run.cached) == (0, 3)


def test_cli_squad_with_scheduler_file(squad, cluster, local_run, tmp_path):
    from typer.testing import CliRunner

    from hamstride.cli import app

    local_out, _ = local_run
    _, scheduler_file = cluster
    config = tmp_path / "settings.toml"
    config.write_text(CONFIG_TOML, encoding="utf-8")
    assert batch.load_config(config) == CONFIG
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["squad", str(squad), "--out", str(out), "--no-report", "--config", str(config),
                                      "--cluster", str(scheduler_file)])
    assert result.exit_code == 1, result.output  # 1: some trials failed (the corrupt one), listed at the end
    assert "sprint_03.c3d" in result.output
    _same_files(local_out, out)


def test_trial_not_visible_on_worker_is_a_failure_record(cluster, tmp_path):
    address, _ = cluster
    missing = str(tmp_path / "gone" / "sprint_09.c3d")
    job = TrialJob(missing, "ZQ01", "2026-02-03_week1", None, AthleteInfo("ZQ01", "2026-02-03_week1"))
    seen = []
    run_on_cluster([(job, "k1")], AnalysisOptions(), address, lambda j, k, r: seen.append((j, k, r)))
    assert len(seen) == 1 and seen[0][0] is job and seen[0][1] == "k1"
    assert seen[0][2]["status"] == "failed" and seen[0][2]["code"] == "not_on_worker"
    assert "shared disk" in seen[0][2]["reason"]


def test_worker_version_mismatch_is_refused(squad, cluster, tmp_path, monkeypatch):
    address, _ = cluster
    monkeypatch.setattr(hamstride, "__version__", "0.0.0-other")
    with pytest.raises(ConfigError, match="same version"):
        run_squad(squad, tmp_path, cluster=address, report=False)


def test_unreachable_scheduler_is_a_config_error(squad, tmp_path, monkeypatch):
    pytest.importorskip("distributed")
    with socket.socket() as sock:  # a port nobody listens on
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    monkeypatch.setattr(executor, "CLUSTER_CONNECT_TIMEOUT_S", 1.0)
    with pytest.raises(ConfigError, match="dask scheduler"):
        run_squad(squad, tmp_path, cluster=f"tcp://127.0.0.1:{port}", report=False)
    with pytest.raises(ConfigError, match="scheduler file"):
        run_squad(squad, tmp_path, cluster=str(tmp_path / "no_such_scheduler.json"), report=False)
    with pytest.raises(ConfigError, match="expects a scheduler address"):
        run_squad(squad, tmp_path, cluster="headnode-without-port", report=False)


def test_missing_dask_extra_tells_how_to_install(squad, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed now raises ImportError
    with pytest.raises(ConfigError, match=r"hamstride\[cluster\]"):
        run_squad(squad, tmp_path, cluster="tcp://127.0.0.1:8786", report=False)


def _crash_on_file_plugin(name: str):
    """Worker plugin: analysing a file called ``name`` kills the worker process, like a native reader crash.

    Registered with the scheduler, it is installed again on every restarted worker, so retries crash as well.
    Defined inside a function so cloudpickle ships it by value to the workers.
    """
    from distributed.diagnostics.plugin import WorkerPlugin

    class CrashOnFile(WorkerPlugin):
        def setup(self, worker):
            import os

            from hamstride.squad import executor as worker_batch

            original = worker_batch._analyse_job

            def crashing(job, options):
                if os.path.basename(job.path) == name:
                    os._exit(70)
                return original(job, options)

            worker_batch._analyse_job = crashing

    return CrashOnFile()


_ORIGINAL_ANALYSE_JOB = None


def _crashing_local(job, options):
    if Path(job.path).name == "sprint_02.c3d":
        import os
        os._exit(70)
    return _ORIGINAL_ANALYSE_JOB(job, options)


@pytest.mark.slow
def test_worker_crash_gives_the_local_pool_record(squad, tmp_path, monkeypatch):
    """A trial that kills its worker process becomes the same failed-trial record as in the local pool."""
    distributed = pytest.importorskip("distributed")
    import dask

    monkeypatch.setattr(sys.modules[__name__], "_ORIGINAL_ANALYSE_JOB", executor._analyse_job)
    monkeypatch.setattr(executor, "_analyse_job", _crashing_local)  # forked pool workers inherit the patch
    local = run_squad(squad, tmp_path / "local", jobs=2, config=CONFIG, report=False)
    monkeypatch.undo()
    with dask.config.set({"distributed.scheduler.allowed-failures": 1}):
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                      dashboard_address=":0") as local_cluster:
            with distributed.Client(local_cluster) as client:
                client.register_plugin(_crash_on_file_plugin("sprint_02.c3d"), name="crash-on-file")
                remote = run_squad(squad, tmp_path / "cluster", cluster=client, config=CONFIG, report=False)
    assert [r["file"] for r in local.failed] == [f"ZQ01/2026-02-03_week1/{n}" for n in ("sprint_02.c3d",
                                                                                        "sprint_03.c3d")]
    assert [(r["file"], r["code"], r["reason"]) for r in remote.failed] == \
        [(r["file"], r["code"], r["reason"]) for r in local.failed]
    assert remote.manifest["counts"] == local.manifest["counts"]
