"""What each page says, as content blocks: the athlete page (and PDF), the squad overview and the timeline page.

The latest session comes first, pictures before tables, the glossary last. Symmetry indices are printed only where
the summary table holds them (they are defined for positive quantities only, so the short head's stretch index
stays empty); this module computes no biomechanics.
"""
from __future__ import annotations

import math
from dataclasses import replace
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from ..numerics import SIDES
from .common import (BODY_MASS_MISSING, CAUTION, FLAG_EXPLANATIONS, GLOSSARY, asymmetry_band, cell_text, column,
                     first_finite, fmt, fmt_pm, info_line, missing, muscle_label, notes_items, num, plural,
                     run_info_get, session_sort_key, summary_value)
from .content import Figure, Folded, Heading, Items, Links, Page, Row, SessionPicker, Table, Text, number, words

FLAG_HEADERS = ("session", "side", "muscle", "flag", "value", "threshold", "message")
_FLAG_WIDTHS = (1.5, 0.6, 0.6, 1.6, 0.6, 0.7, 6.0)


def caution_block() -> Text:
    return Text(CAUTION, "caution", "caution", "Caution.")


def glossary_block() -> Items:
    return Items(tuple(GLOSSARY), "glossary", "glossary")


def flags_explained() -> Items:
    return Items(tuple(FLAG_EXPLANATIONS.items()), "flags-explained")


def notes_block(run_info: Mapping | None) -> Items:
    return Items(tuple(notes_items(run_info)), "notes")


def _flag_order(flags: pd.DataFrame) -> pd.DataFrame:
    """Latest session first, then side and muscle."""
    if flags is None or len(flags) == 0:
        return flags
    keys = flags["session"].map(session_sort_key) if "session" in flags.columns else pd.Series(0, index=flags.index)
    rank = {k: i for i, k in enumerate(sorted(set(keys), reverse=True))}
    return flags.assign(_rank=keys.map(rank)).sort_values(["_rank"], kind="stable").drop(columns="_rank")


def flag_rows(flags: pd.DataFrame, *, athlete_links: Mapping[str, str] | None = None) -> tuple[Row, ...]:
    """One row per flag, latest session first; with ``athlete_links`` the first column names (and links) the athlete."""
    if flags is None or len(flags) == 0:
        return ()
    rows = []
    for rec in _flag_order(flags).to_dict("records"):
        cells = []
        if athlete_links is not None:
            name = str(rec.get("athlete", ""))
            cells.append(words(name, href=athlete_links.get(name)))
        flag = str(rec.get("flag", ""))
        muscle = rec.get("muscle")
        cells += [words(rec.get("session")), words(rec.get("side")),
                  words(None if missing(muscle) else muscle_label(str(muscle))),
                  words(flag, title=FLAG_EXPLANATIONS.get(flag, "")),
                  number(rec.get("value"), 2), number(rec.get("threshold"), 2),
                  words(rec.get("message", ""), wrap=True)]
        rows.append(Row(tuple(cells), cell_text(rec.get("session")), True))
    return tuple(rows)


def _flag_summary(flags: pd.DataFrame) -> str:
    """"3 flags: involved_side_guarding (BFlh, ST right), side_asymmetry (BFlh)" or "no flags"."""
    if flags is None or len(flags) == 0:
        return "no flags"
    parts = []
    for flag, rows in flags.groupby(flags["flag"].astype(str), sort=True):
        where = sorted({muscle_label(str(m)) for m in rows.get("muscle", []) if not missing(m)})
        sides = sorted({str(s) for s in rows.get("side", []) if not missing(s)})
        detail = ", ".join(where) + (f" {'/'.join(sides)}" if sides else "")
        parts.append(f"{flag} ({detail.strip()})" if detail.strip() else flag)
    return f"{plural(len(flags), 'flag')}: " + "; ".join(parts)


def earlier_flags_line(flags: pd.DataFrame, latest: str) -> str:
    """"17 flags in 2 earlier sessions, none in the latest" (or "... 3 in the latest")."""
    if flags is None or len(flags) == 0:
        return "no flags in any session"
    sessions = flags["session"].astype(str)
    earlier = flags[sessions != latest]
    n_latest = int((sessions == latest).sum())
    n_sessions = earlier["session"].nunique()
    latest_text = "none in the latest" if n_latest == 0 else f"{n_latest} in the latest"
    return f"{plural(len(earlier), 'flag')} in {plural(n_sessions, 'earlier session')}, {latest_text}"


# ----------------------------------------------------------------------------------------------------------------
# summary tables (one row per session and muscle)


def _by_session_muscle(summary: pd.DataFrame) -> dict[tuple[str, str], dict[str, dict]]:
    out: dict[tuple[str, str], dict[str, dict]] = {}
    for rec in summary.to_dict("records"):
        out.setdefault((str(rec.get("session")), str(rec.get("muscle"))), {})[str(rec.get("side"))] = rec
    return out


def _shared(recs: Mapping[str, dict], name: str) -> float:
    """A per-pair value (SI, LSI) as the summary holds it on either side's row; NaN when it is empty."""
    for side in (*SIDES, *recs.keys()):
        value = num(recs.get(side, {}).get(name))
        if math.isfinite(value):
            return value
    return math.nan


def _side(recs: Mapping[str, dict], side: str, name: str) -> float:
    return num(recs.get(side, {}).get(name))


def _pm(recs, side, name, digits):
    return number(_side(recs, side, f"{name}_mean"), digits,
                  fmt_pm(_side(recs, side, f"{name}_mean"), _side(recs, side, f"{name}_sd"), digits))


def summary_tables(summary: pd.DataFrame, sessions: Sequence[str], muscles: Sequence[str],
                   with_work: bool) -> list:
    """Stretch table and (with body mass) work/force table, latest session first; L = left, R = right."""
    by_key = _by_session_muscle(summary)
    stretch, work = [], []
    has_force_band = "peak_force_n_p5_mean" in summary.columns and "peak_force_n_p95_mean" in summary.columns
    has_work_band = "negative_work_j_p5_mean" in summary.columns and "negative_work_j_p95_mean" in summary.columns
    for session in reversed(list(sessions)):
        for muscle in muscles:
            recs = by_key.get((session, muscle))
            if not recs:
                continue
            speeds = [_side(recs, s, "speed_m_s") for s in SIDES]
            speed = float(np.nanmean(speeds)) if any(math.isfinite(v) for v in speeds) else math.nan
            label = muscle_label(muscle)
            stretch.append(Row((
                words(session), words(label),
                number(_side(recs, "left", "n_strides"), 0), number(_side(recs, "right", "n_strides"), 0),
                number(speed, 2), _pm(recs, "left", "peak_strain_pct", 1), _pm(recs, "right", "peak_strain_pct", 1),
                number(_side(recs, "left", "peak_strain_pct_cv_pct"), 1),
                number(_side(recs, "right", "peak_strain_pct_cv_pct"), 1),
                number(_shared(recs, "peak_strain_symmetry_index_pct"), 1),
                number(_shared(recs, "peak_strain_lsi_pct"), 0),
                _pm(recs, "left", "peak_fibre_length_lopt", 2), _pm(recs, "right", "peak_fibre_length_lopt", 2),
                _pm(recs, "left", "peak_lengthening_velocity_lopt_per_s", 1),
                _pm(recs, "right", "peak_lengthening_velocity_lopt_per_s", 1)), session))
            cells = [words(session), words(label), _pm(recs, "left", "negative_work_j", 1),
                     _pm(recs, "right", "negative_work_j", 1)]
            if has_work_band:
                cells += [words(_range(recs, s, "negative_work_j", 1)) for s in SIDES]
            cells += [number(_shared(recs, "negative_work_symmetry_index_pct"), 1),
                      number(_shared(recs, "negative_work_lsi_pct"), 0),
                      _pm(recs, "left", "peak_force_n", 0), _pm(recs, "right", "peak_force_n", 0)]
            if has_force_band:
                cells += [words(_range(recs, s, "peak_force_n", 0)) for s in SIDES]
            work.append(Row(tuple(cells), session))
    headers = ("session", "muscle", "strides L", "strides R", "speed (m/s)", "peak stretch L (%)",
               "peak stretch R (%)", "stretch CV L (%)", "stretch CV R (%)", "stretch SI (%)", "stretch LSI (%)",
               "peak l/l_opt L", "peak l/l_opt R", "peak lengthening velocity L (l_opt/s)",
               "peak lengthening velocity R (l_opt/s)")
    titles = ("", "", "strides used, left", "strides used, right", "", "mean ± SD over strides",
              "mean ± SD over strides", "stride-to-stride variation", "stride-to-stride variation",
              "(R − L) ÷ average × 100; empty where undefined (negative stretch)", "involved ÷ uninvolved × 100",
              "", "", "", "")
    blocks: list = [Table("summary", headers, tuple(stretch),
                          "Stretch per session (latest first) and muscle, left (L) and right (R): mean ± SD over "
                          "strides. SI is left empty where it is undefined (the short head shortens below its "
                          "upright length).", titles,
                          widths=(1.9, 0.7, 0.6, 0.6, 0.7, 1.1, 1.1, 0.7, 0.7, 0.7, 0.7, 1.0, 1.0, 1.2, 1.2))]
    if with_work:
        work_headers = ["session", "muscle", "negative work L (J)", "negative work R (J)"]
        if has_work_band:
            work_headers += ["negative work L model range (J)", "negative work R model range (J)"]
        work_headers += ["negative work SI (%)", "negative work LSI (%)", "peak force L (N)", "peak force R (N)"]
        if has_force_band:
            work_headers += ["peak force L model range (N)", "peak force R model range (N)"]
        blocks.append(Table("summary-work", tuple(work_headers), tuple(work),
                            "Negative work and peak force per session and muscle (mean ± SD over strides"
                            + ("; model range = mean 5th to 95th percentile" if has_work_band or has_force_band
                               else "") + ").",
                            widths=(1.9, 0.7) + (1.0,) * (len(work_headers) - 2)))
    else:
        blocks.append(Text(BODY_MASS_MISSING + ".", "note"))
    return blocks


def _range(recs, side, name, digits) -> str:
    lo, hi = _side(recs, side, f"{name}_p5_mean"), _side(recs, side, f"{name}_p95_mean")
    return f"{fmt(lo, digits)} to {fmt(hi, digits)}" if math.isfinite(lo) and math.isfinite(hi) else "–"


def uncertainty_table(strides: pd.DataFrame, muscles: Sequence[str], session: str) -> Table:
    """Peaks with their model range (5th-95th percentile) per muscle and side; force and work when present."""
    bands = [("peak stretch (%)", "peak_strain_pct", "peak_strain_p5_pct", "peak_strain_p95_pct", 1),
             ("peak l/l_opt", "peak_fibre_length_lopt", "peak_fibre_length_lopt_p5", "peak_fibre_length_lopt_p95", 2)]
    for label, name, digits in (("peak force (N)", "peak_force_n", 0), ("negative work (J)", "negative_work_j", 1)):
        if {f"{name}_p5", f"{name}_p95"} <= set(strides.columns) and np.isfinite(
                column(strides, f"{name}_p5").to_numpy(dtype=float)).any():
            bands.append((label, name, f"{name}_p5", f"{name}_p95", digits))
    headers = ["muscle", "side"]
    for label, *_ in bands:
        headers += [label, "model range 5–95 %"]
    rows = []
    for muscle in muscles:
        for side in SIDES:
            sel = strides[(strides["muscle"].astype(str) == muscle) & (strides["side"].astype(str) == side)]
            if sel.empty:
                continue
            cells = [words(muscle_label(muscle)), words(side)]
            for _, name, lo_col, hi_col, digits in bands:
                mean = [float(np.nanmean(v)) if np.isfinite(v).any() else math.nan
                        for v in (column(sel, c).to_numpy(dtype=float) for c in (name, lo_col, hi_col))]
                cells += [number(mean[0], digits),
                          number(mean[1], digits, f"{fmt(mean[1], digits)} to {fmt(mean[2], digits)}")]
            rows.append(Row(tuple(cells), session))
    return Table("uncertainty", tuple(headers), tuple(rows),
                 f"Model uncertainty band for the latest session ({session}; mean over strides).")


def stride_table(strides: pd.DataFrame, muscles: Sequence[str], has_work: bool) -> Table:
    keys = ["session", "trial", "side", "stride"]
    data = strides.copy()
    for k in keys:
        if k not in data.columns:
            data[k] = ""
    order = data["session"].map(session_sort_key)
    rank = {k: i for i, k in enumerate(sorted(set(order), reverse=True))}
    data["_order"] = order.map(rank)
    first = data.sort_values(["_order", "trial", "side", "stride"], kind="stable").groupby(
        keys, sort=False, dropna=False).first()
    values = ["peak_strain_pct"] + (["negative_work_j"] if has_work else [])
    per_muscle = {col: data.pivot_table(index=keys, columns="muscle", values=col, aggfunc="first", dropna=False)
                  for col in values if col in data.columns}
    base_cols = (("stride_time_s", "stride time (s)", 3), ("speed_m_s", "speed (m/s)", 2),
                 ("toe_off_pct", "toe-off (% cycle)", 0), ("late_swing_start_pct", "late swing starts (% cycle)", 0),
                 ("peak_hip_flexion_deg", "peak hip flexion (deg)", 0),
                 ("peak_knee_flexion_deg", "peak knee flexion (deg)", 0))
    headers = ["session", "trial", "side", "stride"] + [h for _, h, _ in base_cols]
    for col in values:
        label = "peak stretch (%)" if col == "peak_strain_pct" else "negative work (J)"
        headers += [f"{label} {muscle_label(m)}" for m in muscles]
    base = {col: first[col].to_numpy() if col in first.columns else np.full(len(first), np.nan)
            for col, _, _ in base_cols}
    muscle_values = {col: (per_muscle[col].reindex(index=first.index, columns=list(muscles)).to_numpy(dtype=float)
                           if col in per_muscle else np.full((len(first), len(muscles)), np.nan)) for col in values}
    rows = []
    for i, idx in enumerate(first.index):
        cells = [words(idx[0]), words(idx[1]), words(idx[2]), number(idx[3], 0, str(idx[3]))]
        cells += [number(base[col][i], digits) for col, _, digits in base_cols]
        for col in values:
            cells += [number(v, 1) for v in muscle_values[col][i]]
        rows.append(Row(tuple(cells), str(idx[0])))
    return Table("strides", tuple(headers), tuple(rows), "Every stride used, latest session first.", widths=(1.9, 0.9, 0.6, 0.5) + (0.8,) * (len(headers) - 4))


# ----------------------------------------------------------------------------------------------------------------
# the athlete page


def headline(summary: pd.DataFrame, flags: pd.DataFrame, latest: str, run_info: Mapping | None) -> str:
    """One sentence on the latest session: speed, BFlh peak stretch per side with its band, symmetry, flags."""
    lat = summary[summary["session"].astype(str) == latest] if len(summary) else summary
    parts = [f"Latest session {latest}"]
    speed = column(lat, "speed_m_s").to_numpy(dtype=float)
    if np.isfinite(speed).any():
        parts[0] += f": {np.nanmean(speed):.2f} m/s"
    bflh = lat[lat["muscle"].astype(str) == "biceps_femoris_long"] if len(lat) else lat
    sides = []
    for side in SIDES:
        value = summary_value(bflh, side, "peak_strain_pct_mean") if len(bflh) else math.nan
        if math.isfinite(value):
            lo = summary_value(bflh, side, "peak_strain_p5_pct_mean")
            hi = summary_value(bflh, side, "peak_strain_p95_pct_mean")
            band = f" (model range {lo:.1f}–{hi:.1f})" if math.isfinite(lo) and math.isfinite(hi) else ""
            sides.append(f"{side} {value:.1f} %{band}")
    if sides:
        parts.append("BFlh peak stretch " + ", ".join(sides))
    si = first_finite(bflh, "peak_strain_symmetry_index_pct") if len(bflh) else math.nan
    if math.isfinite(si):
        band = asymmetry_band(run_info)
        parts.append(f"stretch symmetry index {si:+.1f} % ({'within' if abs(si) <= band else 'beyond'} "
                     f"±{band:g} %)")
    lsi = first_finite(bflh, "peak_strain_lsi_pct") if len(bflh) else math.nan
    if math.isfinite(lsi):
        parts.append(f"LSI {lsi:.0f} %")
    latest_flags = flags[flags["session"].astype(str) == latest] if len(flags) else flags
    parts.append(_flag_summary(latest_flags))
    return "; ".join(parts) + "."


def athlete_page(athlete: str, *, info: Mapping, sessions: Sequence[str], muscles: Sequence[str],
                 strides: pd.DataFrame, flags: pd.DataFrame, summary: pd.DataFrame, figures: Sequence[Figure],
                 timeline: Figure | None, links: Sequence[tuple[str, str]], mass_missing: bool,
                 run_info: Mapping | None) -> Page:
    latest = sessions[-1] if sessions else ""
    str_latest = strides[strides["session"].astype(str) == latest] if len(strides) else strides
    blocks: list = [Text(info_line(info)),
                    Text(f"{plural(len(sessions), 'session')}: {', '.join(reversed(sessions)) or 'none'} "
                         "(latest first).", "explain")]
    if links:
        blocks.append(Links(tuple(links), "files", "Files:"))
    blocks += [caution_block(), Text(headline(summary, flags, latest, run_info), "headline", "headline")]
    if mass_missing:
        blocks.append(Text(BODY_MASS_MISSING + ".", "note", "body-mass-missing"))
    if timeline is not None:
        blocks.append(replace(timeline, title="Return-to-run timeline"))
    if len(sessions) > 1:
        blocks.append(SessionPicker(tuple(sessions), latest))
    blocks += list(figures)
    is_latest = flags["session"].astype(str) == latest if len(flags) else pd.Series(dtype=bool)
    n_latest = int(is_latest.sum()) if len(flags) else 0
    blocks += [Heading("Flags", "flags-heading"),
               Text(f"{plural(n_latest, 'flag')} in the latest session"
                    + (f"; {earlier_flags_line(flags, latest)}" if len(sessions) > 1 else "")
                    + ". A flag is a prompt to look closer, not a finding.", "explain"),
               Table("flags", FLAG_HEADERS, flag_rows(flags[is_latest] if len(flags) else flags),
                     widths=_FLAG_WIDTHS)]
    if len(flags) and n_latest < len(flags):  # earlier sessions' flags folded under one line
        blocks.append(Folded(f"Earlier sessions: {earlier_flags_line(flags, latest)}",
                             (Table("flags-earlier", FLAG_HEADERS, flag_rows(flags[~is_latest]),
                                    widths=_FLAG_WIDTHS),), "earlier-flags"))
    blocks += [flags_explained(), Heading("Summary per session", "summary-heading")]
    blocks += summary_tables(summary, sessions, muscles, not mass_missing) if len(summary) else [
        Text("No summary rows.")]
    blocks += [Heading("Model uncertainty band", "uncertainty-heading"),
               Text("The model needs muscle dimensions we cannot measure in each athlete; the range shows how far "
                    "the peaks could move when those dimensions vary within their published spread.", "explain"),
               uncertainty_table(str_latest, muscles, latest),
               Heading("Strides", "strides-heading")]
    if mass_missing:
        blocks.append(Text(f"Negative work is not shown: {BODY_MASS_MISSING}.", "explain"))
    blocks += [stride_table(strides, muscles, not mass_missing),
               Heading("Notes on the model", "notes-heading"), notes_block(run_info),
               Heading("Terms used", "terms"), glossary_block()]
    return Page(f"hamstride · {athlete}", f"Athlete {athlete}", tuple(blocks), home="../index.html", pdf=True)


# ----------------------------------------------------------------------------------------------------------------
# the squad overview


def squad_page(rows: Sequence[Row], latest_flags: Sequence[Row], earlier: Sequence[tuple[str, tuple[Row, ...]]],
               n_athletes: int, generated: str, version: str, files: Sequence[tuple[str, str]],
               failed_rows: Sequence[Row], run_info: Mapping | None, muscles_note: str) -> Page:
    band = asymmetry_band(run_info)
    headers = ("athlete", "latest session", "sessions", "injured side", "speed (m/s)",
               "peak stretch per side (model range) · symmetry index vs ±" + f"{band:g} %", "BFlh stretch SI (%)",
               "flags in the latest session", "PDF", "timeline")
    titles = ("", "", "", "", "mean over strides, latest session",
              "left: peak stretch (circle = left, triangle = right; bar = model range 5–95 %) on one squad scale; "
              f"right: symmetry index per muscle, the shaded zone is ±{band:g} %; a bold outline = beyond the zone",
              "(R − L) ÷ average × 100", "", "", "")
    athletes = Table("athletes", headers, tuple(rows),
                     "Latest session of each athlete. " + muscles_note, titles)
    blocks: list = [Text(f"{plural(n_athletes, 'athlete')} · generated {generated} · hamstride {version}")]
    if files:
        blocks.append(Links(tuple(files), "tables", "Tables:"))
    blocks += [caution_block(), Heading("Athletes", "athletes-heading"), athletes,
               Heading("Flags in the latest sessions", "flags-heading"),
               Text(f"{plural(len(latest_flags), 'flag')} in the athletes' latest sessions. A flag is a prompt to "
                    "look closer, not a finding.", "explain"),
               Table("flags", ("athlete", *FLAG_HEADERS), tuple(latest_flags),
                     widths=(1.0,) + _FLAG_WIDTHS)]
    if earlier:
        blocks.append(Heading("Flags in earlier sessions", "earlier-flags"))
        blocks += [Folded(summary, (Table(f"flags-earlier-{i}", ("athlete", *FLAG_HEADERS), rows,
                                          widths=(1.0,) + _FLAG_WIDTHS),), f"earlier-{i}")
                   for i, (summary, rows) in enumerate(earlier)]
    blocks += [flags_explained(),
               Heading("Trials not analysed", "failed-heading"),
               Table("failed", ("trial", "reason"), tuple(failed_rows),
                     "Trials that could not be analysed (they are left out of every table and plot)."),
               Heading("Notes on the model", "notes-heading"), notes_block(run_info),
               Heading("Terms used", "terms"), glossary_block()]
    return Page("hamstride · squad overview", "Squad overview: hamstring stretch in sprinting", tuple(blocks))


def failed_rows(run_info: Mapping | None) -> tuple[Row, ...]:
    rows = []
    for item in run_info_get(run_info, "failed_trials", "failed", default=[]) or []:
        if isinstance(item, Mapping):
            trial = item.get("trial", item.get("file", item.get("path", "")))
            reason = item.get("reason", item.get("message", ""))
        elif isinstance(item, (list, tuple)):
            trial, reason = (list(item) + ["", ""])[:2]
        else:
            trial, reason = item, ""
        rows.append(Row((words(trial), words(reason, wrap=True))))
    return tuple(rows)


# ----------------------------------------------------------------------------------------------------------------
# the timeline page


def timeline_page(athlete: str, info: Mapping, ordered: pd.DataFrame, sessions: Sequence[str],
                  dates: Mapping[str, str], days: Mapping[str, float], lsi_cols: Sequence[str], figure: Figure,
                  run_info: Mapping | None, home: str | None) -> Page:
    has_injury = any(math.isfinite(v) for v in days.values())
    lsi_names = {"lsi_pct": "LSI (%)", "peak_strain_lsi_pct": "LSI stretch (%)",
                 "negative_work_lsi_pct": "LSI negative work (%)"}
    rows = []
    for rec in ordered.to_dict("records"):
        s = str(rec.get("session", ""))
        cells = [words(s), words(dates.get(s, ""))]
        if has_injury:
            cells.append(number(days.get(s), 0))
        cells += [words(muscle_label(str(rec.get("muscle", "")))), words(rec.get("side", "")),
                  number(rec.get("speed_m_s"), 2), number(rec.get("peak_strain_pct_mean"), 1),
                  number(rec.get("peak_fibre_length_lopt_mean"), 2), number(rec.get("negative_work_j_mean"), 1)]
        cells += [number(rec.get(c), 0) for c in lsi_cols]
        rows.append(Row(tuple(cells), s))
    headers = ("session", "date") + (("days since injury",) if has_injury else ()) + (
        "muscle", "side", "speed (m/s)", "peak stretch (%)", "peak l/l_opt", "negative work (J)") + tuple(
        lsi_names[c] for c in lsi_cols)
    work_missing = not np.isfinite(column(ordered, "negative_work_j_mean").to_numpy(dtype=float)).any()
    blocks: list = [Text(info_line(info)) if info else Text(""),
                    Text(f"{plural(len(sessions), 'session')} in date order: {', '.join(sessions)}."),
                    caution_block()]
    if work_missing:
        blocks.append(Text(BODY_MASS_MISSING + ".", "note", "body-mass-missing"))
    blocks += [figure, Heading("Table"),
               Table("timeline", headers, tuple(rows), "One row per session, muscle and side (means over strides)."),
               Heading("Notes on the model", "notes-heading"), notes_block(run_info),
               Heading("Terms used", "terms"), glossary_block()]
    return Page(f"hamstride · timeline {athlete}", f"Timeline: athlete {athlete}", tuple(blocks), home=home)


__all__ = ["athlete_page", "squad_page", "timeline_page", "headline", "flag_rows", "earlier_flags_line"]
