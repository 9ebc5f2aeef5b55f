"""Invented benchmark squads: trials of chosen lengths and squad folders of any size (fictional athletes)."""
from __future__ import annotations

import shutil
from dataclasses import fields
from pathlib import Path

from hamstride.synth import AthleteBody, SprintSpec, write_sprint_trial, write_static_trial

SPEC_FIELDS = {f.name for f in fields(SprintSpec)}


def spec(**kwargs) -> SprintSpec:
    """A SprintSpec from the keyword arguments the installed synth module knows (others are dropped)."""
    return SprintSpec(**{k: v for k, v in kwargs.items() if k in SPEC_FIELDS})


def write_trial(path: Path, duration_s: float = 2.0, speed_m_s: float = 8.5, seed: int = 0,
                body: AthleteBody | None = None, athlete: str = "BENCH") -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    extra = {"body": body} if body is not None else {}
    write_sprint_trial(path, spec(duration_s=duration_s, speed_m_s=speed_m_s, seed=seed, athlete=athlete, **extra))
    return path


def write_squad(root: Path, n_trials: int, *, trials_per_session: int = 4, sessions_per_athlete: int = 2,
                duration_s: float = 2.0, distinct: int = 16, pool: Path | None = None, statics: bool = False) -> Path:
    """ROOT/athletes.csv + ROOT/<athlete>/<YYYY-MM-DD_sN>/sprint_XX.c3d with ``n_trials`` trials in total.

    Only ``distinct`` different trials are simulated (speeds 7.5-9.5 m/s, different seeds); the rest are copies
    placed in other athlete/session folders, so every trial still has its own cache key. ``statics``: every
    session also gets a 1 s static calibration trial (``static.c3d``), as a lab records them.
    """
    root = Path(root)
    if root.exists():
        shutil.rmtree(root)
    root.mkdir(parents=True)
    pool = Path(pool) if pool is not None else root.parent / f".pool-{duration_s:g}s"
    sources = []
    static_src = pool / "static.c3d"
    if statics and not static_src.exists():
        pool.mkdir(parents=True, exist_ok=True)
        write_static_trial(static_src, athlete="BENCH")
    for k in range(min(distinct, n_trials)):
        src = pool / f"trial_{k:02d}.c3d"
        if not src.exists():
            write_trial(src, duration_s=duration_s, speed_m_s=7.5 + 2.0 * k / max(distinct - 1, 1), seed=100 + k)
        sources.append(src)
    per_athlete = trials_per_session * sessions_per_athlete
    n_athletes = -(-n_trials // per_athlete)
    rows = ["athlete,body_mass_kg,height_m,sex,involved_side,injury_date"]
    written = 0
    for a in range(n_athletes):
        code = f"BX{a + 1:03d}"
        rows.append(f"{code},{70 + a % 15},{1.72 + 0.01 * (a % 15):.2f},{'female' if a % 3 == 2 else 'male'},"
                    f"{('none', 'left', 'right')[a % 3]},")
        for s in range(sessions_per_athlete):
            session = root / code / f"2026-{1 + s % 12:02d}-{1 + s // 12:02d}_s{s + 1}"
            for t in range(trials_per_session):
                if written == n_trials:
                    break
                session.mkdir(parents=True, exist_ok=True)
                shutil.copyfile(sources[written % len(sources)], session / f"sprint_{t + 1:02d}.c3d")
                if statics and t == 0:
                    shutil.copyfile(static_src, session / "static.c3d")
                written += 1
    (root / "athletes.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    return root
