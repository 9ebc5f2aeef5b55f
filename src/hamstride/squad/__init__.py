"""Squad runs, by responsibility: :mod:`.discovery` (folder layout -> trial jobs), :mod:`.cache` (binary per-trial
tables keyed by inputs + configuration + code), :mod:`.executor` (process pool or Dask cluster), :mod:`.export`
(CSV/Parquet writers, manifest), :mod:`.timeline` (return-to-run timeline data) and :mod:`.run` (``run_squad``,
which ties them together). Input checking and configuration live in :mod:`hamstride.squadinput` and
:mod:`hamstride.settings`.
"""
from __future__ import annotations

from .run import SquadRun, run_squad

__all__ = ["run_squad", "SquadRun"]
