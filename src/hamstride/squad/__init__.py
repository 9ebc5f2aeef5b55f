"""Squad runs, by responsibility: :mod:`.discovery` (folder layout -> trial jobs), :mod:`.cache` (binary per-trial
tables keyed by inputs + configuration + code), :mod:`.executor` (process pool or Dask cluster), :mod:`.export`
(CSV/Parquet writers, manifest), :mod:`.timeline` (return-to-run timeline data) and :mod:`.run` (``run_squad``,
which ties them together). Input checking and configuration live in :mod:`hamstride.squadinput` and
:mod:`hamstride.settings`.
"""
from __future__ import annotations

__all__ = ["run_squad", "SquadRun"]


def __getattr__(name: str):
    # Loaded on first use (PEP 562), so importing a light part (the executor, discovery) does not load pandas and the
    # whole squad run: the command starts its worker processes before that import.
    if name in __all__:
        from . import run

        return getattr(run, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
