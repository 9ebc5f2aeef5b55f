"""Timeline data: one athlete's sessions in date order, with days since injury, for the return-to-run page."""
from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from ..squadinput import session_date

__all__ = ["build_timeline"]


def build_timeline(run, athlete: str) -> pd.DataFrame:
    """Sessions of one athlete in date order: speed, peak strain, l/l_opt, negative work per side, LSI, days since injury."""
    summary = run.summary[run.summary["athlete"] == athlete].copy()
    if summary.empty:
        return summary
    summary["date"] = [str(session_date(s) or "") for s in summary["session"]]
    injury = None
    row = run.athletes[run.athletes["athlete"] == athlete]
    if not row.empty and isinstance(row.iloc[0].get("injury_date"), str):
        try:
            injury = dt.date.fromisoformat(row.iloc[0]["injury_date"].strip())
        except ValueError:
            injury = None
    summary["days_since_injury"] = [((session_date(s) - injury).days if injury and session_date(s) else np.nan)
                                    for s in summary["session"]]
    cols = ["athlete", "session", "date", "days_since_injury", "side", "muscle", "n_strides", "speed_m_s",
            "peak_strain_pct_mean", "peak_strain_pct_sd", "peak_fibre_length_lopt_mean", "negative_work_j_mean",
            "peak_strain_symmetry_index_pct", "peak_strain_lsi_pct", "negative_work_lsi_pct"]
    summary = summary.sort_values(["date", "session", "muscle", "side"], kind="stable")
    return summary[[c for c in cols if c in summary.columns]].reset_index(drop=True)
