"""Squad discovery: the checked folder layout (:mod:`hamstride.squadinput`) turned into one job per sprint trial."""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..pipeline import AthleteInfo
from ..squadinput import SquadLayout, scan_squad

__all__ = ["TrialJob", "discover_squad"]


@dataclass(frozen=True)
class TrialJob:
    """One sprint trial to analyse: its file, athlete, session, the session's static trial and the marker map."""

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
