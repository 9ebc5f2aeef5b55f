"""Squad runs (compatibility module): the code lives in :mod:`hamstride.squad` (discovery, cache, executor, export,
timeline, run); these names stay importable from here for notebooks and scripts written against older versions.
"""
from __future__ import annotations

from .atomic import remove_stale_partials
from .settings import RunConfig, config_toml, load_config
from .squad.cache import CACHE_DIR, code_fingerprint, file_sha256
from .squad.discovery import TrialJob, discover_squad
from .squad.executor import CLUSTER_CONNECT_TIMEOUT_S, run_on_cluster, tune_allocator
from .squad.export import columns_csv, table_csv, write_table
from .squad.run import SquadRun, run_squad
from .squad.timeline import build_timeline

default_config_toml = config_toml

__all__ = ["run_squad", "SquadRun", "discover_squad", "TrialJob", "build_timeline", "run_on_cluster",
           "tune_allocator", "table_csv", "columns_csv", "write_table", "file_sha256", "code_fingerprint",
           "remove_stale_partials", "load_config", "RunConfig", "default_config_toml", "CACHE_DIR",
           "CLUSTER_CONNECT_TIMEOUT_S"]
