"""Writing the reports: the squad overview, one page and PDF per athlete, and the return-to-run timelines.

Every file goes through io's atomic writer into the output folder (names through :func:`safe_component`, paths
checked with :func:`inside`). Athlete pages render in a process pool when the run has more than one job.
"""
from __future__ import annotations

import functools
from dataclasses import replace
import math
import os
import time
from pathlib import Path
from typing import Callable, Mapping, Sequence
from urllib.parse import quote

import numpy as np
import pandas as pd

from ..numerics import SIDES
from .common import (DATE_PREFIX, asymmetry_band, athlete_files, athlete_info, by_athlete, column, csv_cell,
                     empty_like, first_finite, fmt, guarding_lsi, has_values, inside, latest_summary, missing,
                     muscle_label, muscles_in_order, num, plural, run_info_get, sessions_in_order, session_sort_key,
                     summary_value, thresholds_of, write_atomic)
from .content import Cell, Figure, Row, number, words
from .figures import (FIGURE_COLUMNS, curve_stats, force_figure, joint_figure, mini_geometry, raster,
                      stretch_figure, timeline_figure)
from .pages import athlete_page, earlier_flags_line, failed_rows, flag_rows, squad_page, timeline_page
from .pdf import write_pdf
from .web import render_html

__all__ = ["TABLE_FILES", "render_squad", "render_timeline"]

TABLE_FILES = ("strides.csv", "curves.csv", "summary.csv", "flags.csv", "manifest.json")
_FLAG_MUSCLES = ("biceps_femoris_long", "semitendinosus", "semimembranosus")


def _flag_muscles(run_info: Mapping | None) -> tuple[str, ...]:
    found = thresholds_of(run_info).get("muscles")
    return tuple(str(m) for m in found) if isinstance(found, (list, tuple)) and found else _FLAG_MUSCLES


_STRETCH_CAPTION = (
    "Each column is one hamstring muscle; lines are the average over strides (left solid with circles, right "
    "dashed with triangles), bands show ± SD. The hatched ribbon at the top of each panel marks late swing, "
    "where the curves are drawn bold; the small carets on the time axis mark toe-off (one per side). Stars "
    "mark the average of each stride's peak (a little above the average curve because strides peak at "
    "slightly different times); the bar through a star is the model range (5–95 %). The dotted line at 1.0 "
    "in the middle row is the optimal fibre length.")


def render_squad(out_dir: Path, strides: pd.DataFrame, curves, flags: pd.DataFrame, summary: pd.DataFrame,
                 athletes: pd.DataFrame, run_info: dict, *, timelines: Mapping[str, pd.DataFrame] | None = None,
                 progress: Callable[[int, int], None] | None = None) -> list[Path]:
    """Write ``index.html``, ``athletes/<name>.html`` and ``.pdf`` per athlete, and the timeline (``timeline_<name>``
    ``.png/.html/.csv``) of every athlete whose ``timelines`` table holds two or more sessions; returns the paths.

    ``curves`` is the curves table, or a function athlete -> that athlete's curves (loaded while the page renders,
    so a large squad never holds every curve in memory). ``progress(done, total)`` is called once per athlete.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    curve_loader = curves if callable(curves) else None
    tables = (("strides", strides), ("flags", flags), ("summary", summary))
    groups = {name: by_athlete(df) for name, df in (tables if curve_loader else tables + (("curves", curves),))}
    names = sorted(set().union(*(g.keys() for g in groups.values())), key=str)
    files = athlete_files(names)
    timelines = timelines or {}
    jobs, written = [], []
    for athlete in names:
        html_path = inside(out_dir, out_dir / "athletes" / f"{files[athlete]}.html")
        pdf_path = inside(out_dir, out_dir / "athletes" / f"{files[athlete]}.pdf")
        tl = timelines.get(athlete)
        if tl is not None and (len(tl) == 0 or tl["session"].nunique() < 2):
            tl = None
        jobs.append((athlete, groups["strides"].get(athlete, empty_like(strides)),
                     functools.partial(curve_loader, athlete) if curve_loader
                     else groups["curves"].get(athlete, empty_like(curves)),
                     groups["flags"].get(athlete, empty_like(flags)),
                     groups["summary"].get(athlete, empty_like(summary)),
                     athlete_info(athletes, athlete), run_info, out_dir, files[athlete], tl))
        written += [html_path, pdf_path]
        if tl is not None:
            written += [out_dir / f"timeline_{files[athlete]}.{ext}" for ext in ("png", "html", "csv")]
    workers = _report_workers(run_info, len(jobs))
    done = 0
    if progress:
        progress(done, len(jobs))
    if workers > 1:
        import gc
        from concurrent.futures import ProcessPoolExecutor, as_completed

        _warm_renderers()  # once here: the forked page workers inherit the loaded renderers
        gc.freeze()  # what the workers inherit is never collected again there (nor copied by a collection)
        try:
            with ProcessPoolExecutor(max_workers=workers) as pool:
                for future in as_completed([pool.submit(_render_athlete, job) for job in jobs]):
                    future.result()
                    done += 1
                    if progress:
                        progress(done, len(jobs))
        finally:
            gc.unfreeze()
    else:
        for job in jobs:
            _render_athlete(job)
            done += 1
            if progress:
                progress(done, len(jobs))
    index = inside(out_dir, out_dir / "index.html")
    write_atomic(index, render_html(_index_page(out_dir, names, files, groups, strides, flags, summary, athletes,
                                                run_info)))
    return [index] + written


def _warm_renderers() -> None:
    """Load matplotlib (with its font cache), reportlab with our fonts and styles, PIL and the jinja2 templates in
    this process, so page workers forked from it do not each load them again (about 0.4 s of CPU per worker)."""
    from . import figures, pdf, web

    fig = figures.new_figure(1.0, 1.0)
    fig.subplots().set_title("warm-up")
    figures.raster(fig, dpi=20)
    pdf._fonts()
    pdf._styles()
    env = web._environment()
    for name in env.list_templates():
        env.get_template(name)
    import reportlab.platypus  # noqa: F401
    from matplotlib import gridspec, lines, patches, ticker  # noqa: F401
    from reportlab.lib import pagesizes, utils  # noqa: F401


def _report_workers(run_info: Mapping | None, n_athletes: int) -> int:
    """Processes for the athlete pages: ``run_info['report_jobs']`` (or ``'jobs'``), at most one per athlete."""
    requested = num(run_info_get(run_info, "report_jobs", "jobs", default=1))
    if not math.isfinite(requested) or requested < 1:
        return 1
    return int(max(1, min(requested, n_athletes, os.cpu_count() or 1)))


def _render_athlete(job: tuple) -> float:
    """Render one athlete's page, PDF and timeline (top-level, so a process pool can run it); returns CPU s."""
    import gc

    start = time.process_time()
    was_enabled = gc.isenabled()
    gc.disable()  # the page builds many short-lived objects; collecting mid-render only costs time
    try:
        athlete, strides, curves, flags, summary, info, run_info, out_dir, stem, tl = job
        _athlete_outputs(athlete, strides, curves() if callable(curves) else curves, flags, summary, info,
                         run_info, out_dir, stem, tl)
    finally:
        if was_enabled:
            gc.enable()
    return time.process_time() - start


def _distinct(df: pd.DataFrame, name: str) -> list:
    """The distinct values of a column (empty when the table lacks it)."""
    return df[name].unique().tolist() if name in df.columns else []


def _athlete_outputs(athlete: str, strides: pd.DataFrame, curves: pd.DataFrame, flags: pd.DataFrame,
                     summary: pd.DataFrame, info: Mapping, run_info: Mapping | None, out_dir: Path, stem: str,
                     tl: pd.DataFrame | None) -> None:
    sessions = sessions_in_order([*_distinct(strides, "session"), *_distinct(summary, "session"),
                                  *_distinct(curves, "session")])
    latest = sessions[-1] if sessions else ""
    muscles = muscles_in_order([*_distinct(curves, "muscle"), *_distinct(strides, "muscle"),
                                *_distinct(summary, "muscle")])
    cur_latest = curves[curves["session"].astype(str) == latest] if len(curves) else curves
    str_latest = strides[strides["session"].astype(str) == latest] if len(strides) else strides
    mass_missing = not (has_values(strides, ("peak_force_n", "negative_work_j")) or has_values(cur_latest,
                                                                                              ("force_n",)))
    figures = []
    stats = curve_stats(cur_latest, FIGURE_COLUMNS) if len(cur_latest) else {}  # shared by the three pictures
    if len(cur_latest):
        figures.append(Figure(
            "fig-stretch", "Late-swing stretch, fibre length and lengthening velocity",
            _STRETCH_CAPTION,
            raster(stretch_figure(cur_latest, str_latest, muscles,
                                  f"{athlete} · {latest} · muscle stretch over the gait cycle (left vs right)",
                                  stats=stats)),
            "Stretch, fibre length and lengthening velocity over the gait cycle"))
        if not mass_missing:
            figures.append(Figure(
                "fig-force", "Force and power",
                "Estimated force of each muscle (N) and its power (W). Power below zero means the muscle absorbs "
                "energy while being stretched under load — that area is the negative work. Stars mark the average "
                "peak force of the strides" + (", bars its model range (5–95 %)." if "peak_force_n_p5" in
                                               strides.columns else "."),
                raster(force_figure(cur_latest, str_latest, muscles,
                                    f"{athlete} · {latest} · estimated muscle force and power", stats=stats)),
                "Muscle force and power over the gait cycle"))
        figures.append(Figure(
            "fig-joints", "Hip and knee angles",
            "Hip flexion (thigh forward of the pelvis) and knee flexion in degrees, 0 = standing upright; the "
            "hamstrings are longest when the hip is flexed and the knee straight, at the end of swing.",
            raster(joint_figure(cur_latest, str_latest, f"{athlete} · {latest} · hip and knee flexion",
                                stats=stats)),
            "Hip and knee flexion over the gait cycle"))
    if len(sessions) > 1 and figures:  # the picker shows an earlier session's curves too (HTML only)
        figures = [replace(f, session=latest) for f in figures]
        for i, session in enumerate(sessions[:-1]):
            cur = curves[curves["session"].astype(str) == session]
            if len(cur):
                figures.insert(i, Figure(
                    f"fig-stretch-{i}", f"Late-swing stretch ({session})",
                    "Stretch of each hamstring muscle over the gait cycle in an earlier session, drawn as in the "
                    "latest session's picture (choose \"all sessions\" to see the latest session again).",
                    raster(stretch_figure(cur, strides[strides["session"].astype(str) == session], muscles,
                                          f"{athlete} · {session} · muscle stretch over the gait cycle",
                                          compact=True)),
                    f"Stretch over the gait cycle, session {session}", session, latest=False))
    timeline_block = None
    links = [("PDF of this page", f"{quote(stem)}.pdf")]
    if tl is not None:
        _, timeline_block = _timeline_outputs(out_dir, f"timeline_{stem}", tl, athlete, info, run_info,
                                              home="index.html")
        links.append(("timeline page", f"../timeline_{quote(stem)}.html"))
    athlete_dir = out_dir / "athletes"
    if (athlete_dir / f"{stem}_curves.csv").exists():
        links.append(("curves (CSV)", f"{quote(stem)}_curves.csv"))
    links.append(("squad overview", "../index.html"))
    page = athlete_page(athlete, info=info, sessions=sessions, muscles=muscles, strides=strides, flags=flags,
                        summary=summary, figures=figures, timeline=timeline_block, links=links,
                        mass_missing=mass_missing, run_info=run_info)
    write_atomic(inside(out_dir, athlete_dir / f"{stem}.html"), render_html(page))
    write_pdf(inside(out_dir, athlete_dir / f"{stem}.pdf"), page)


# ----------------------------------------------------------------------------------------------------------------
# timeline


def _timeline_outputs(out_dir: Path, stem: str, timeline: pd.DataFrame, athlete: str, athlete_info_: Mapping | None,
                      run_info: Mapping | None, home: str | None) -> tuple[list[Path], Figure]:
    """Write ``<stem>.png``, ``.html`` and ``.csv``; returns the paths and the picture (for the athlete page)."""
    tl = timeline.copy()
    for col in ("session", "side", "muscle"):
        if col not in tl.columns:
            tl[col] = ""
    sessions = sessions_in_order(tl["session"])
    muscles = muscles_in_order(tl["muscle"])
    days = {s: first_finite(tl[tl["session"].astype(str) == s], "days_since_injury") for s in sessions}
    dates = {}
    for s in sessions:
        d = tl.loc[tl["session"].astype(str) == s, "date"] if "date" in tl.columns else pd.Series(dtype=object)
        stamp = pd.to_datetime(d, errors="coerce").dropna()
        match = DATE_PREFIX.match(s)
        dates[s] = str(stamp.iloc[0].date()) if len(stamp) else (match.group(0) if match else s)
    xlabels = [dates[s] + (f"\nday {days[s]:.0f}" if math.isfinite(days[s]) else "") for s in sessions]
    lsi_cols = [c for c in ("lsi_pct", "peak_strain_lsi_pct") if c in tl.columns][:1]
    if "negative_work_lsi_pct" in tl.columns:
        lsi_cols.append("negative_work_lsi_pct")
    has_injury = any(math.isfinite(v) for v in days.values())
    x_title = "session date" + (" (day N = days since the injury date in athletes.csv)" if has_injury else "")
    lsi_line = guarding_lsi(run_info)
    png = raster(timeline_figure(tl, athlete, sessions, xlabels, muscles, lsi_cols, x_title, lsi_line))
    figure = Figure("fig-timeline", "Sessions over time",
                    "Top: running speed per session. Then, per muscle (columns): peak stretch, peak l/l_opt (dotted "
                    "line = optimal length), negative work per stride, and the limb symmetry index (LSI = involved ÷ "
                    f"uninvolved side × 100; the dash-dot line marks {lsi_line:g} %, often suggested as the minimum "
                    "before return to sport, and the shaded target zone lies above it). Left solid with circles, "
                    "right dashed with triangles. Values are means over the strides of each session."
                    + (" Labels under the bottom row give days since the injury date in athletes.csv."
                       if has_injury else ""), png,
                    "Timeline of speed, stretch, fibre length, negative work and LSI")
    out_dir = Path(out_dir)
    png_path = write_atomic(inside(out_dir, out_dir / f"{stem}.png"), png.png)
    rank = {m: i for i, m in enumerate(muscles)}
    ordered = tl.assign(_key=tl["session"].map(session_sort_key), _m=tl["muscle"].astype(str).map(rank)).sort_values(
        ["_key", "_m", "side"], kind="stable").drop(columns=["_key", "_m"])
    csv_path = write_atomic(inside(out_dir, out_dir / f"{stem}.csv"), _timeline_csv(ordered))
    page = timeline_page(athlete, dict(athlete_info_ or {}), ordered, sessions, dates, days, lsi_cols, figure,
                         run_info, home)
    html_path = write_atomic(inside(out_dir, out_dir / f"{stem}.html"), render_html(page))
    return [png_path, html_path, csv_path], figure


_TIMELINE_DIGITS = {"days_since_injury": 0, "n_strides": 0, "speed_m_s": 3, "peak_strain_pct_mean": 3,
                    "peak_strain_pct_sd": 3, "peak_fibre_length_lopt_mean": 4, "negative_work_j_mean": 3,
                    "peak_strain_symmetry_index_pct": 2, "peak_strain_lsi_pct": 2, "negative_work_lsi_pct": 2,
                    "lsi_pct": 2}


def _timeline_csv(ordered: pd.DataFrame) -> str:
    """The timeline table as CSV: numbers rounded to what they can tell (mm-level strain, 0.01 % indices),
    text cells guarded against spreadsheet formulas."""
    frame = ordered.copy()
    for col in frame.columns:
        if col in _TIMELINE_DIGITS:
            values = pd.to_numeric(frame[col], errors="coerce").round(_TIMELINE_DIGITS[col])
            frame[col] = values.astype("Int64") if _TIMELINE_DIGITS[col] == 0 else values
        elif frame[col].dtype == object:
            frame[col] = frame[col].map(csv_cell)
        elif pd.api.types.is_float_dtype(frame[col]):
            frame[col] = frame[col].round(4)
    return frame.to_csv(index=False)


def render_timeline(out_dir: Path, timeline: pd.DataFrame, athlete: str, athlete_info: dict | None,
                    run_info: Mapping | None) -> list[Path]:
    """Write ``timeline_<athlete>.png``, ``.html`` and ``.csv`` (sessions in date order); returns the paths.

    ``timeline`` has one row per session × side × muscle with ``session, date, days_since_injury, side, muscle,
    speed_m_s, peak_strain_pct_mean, peak_fibre_length_lopt_mean, negative_work_j_mean`` and an LSI column
    (``lsi_pct`` or ``peak_strain_lsi_pct``; ``negative_work_lsi_pct`` is drawn too when present).
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    stem = f"timeline_{athlete_files([str(athlete)])[str(athlete)]}"
    home = "index.html" if (out_dir / "index.html").exists() else None
    paths, _ = _timeline_outputs(out_dir, stem, timeline, str(athlete), athlete_info, run_info, home)
    return paths


# ----------------------------------------------------------------------------------------------------------------
# squad overview


def _index_page(out_dir: Path, names: Sequence[str], files: Mapping[str, str], groups: Mapping[str, dict],
                strides: pd.DataFrame, flags: pd.DataFrame, summary: pd.DataFrame, athletes: pd.DataFrame,
                run_info: Mapping | None):
    latest_groups = by_athlete(latest_summary(summary))
    band = asymmetry_band(run_info)
    flag_muscles = _flag_muscles(run_info)
    minis, stretch_values, si_values = {}, [], []
    for athlete in names:
        lat = latest_groups.get(athlete, empty_like(summary))
        rows = []
        for muscle in flag_muscles:
            sel = lat[lat["muscle"].astype(str) == muscle] if len(lat) else lat
            if sel.empty:
                continue
            r = {"muscle": muscle, "si": first_finite(sel, "peak_strain_symmetry_index_pct")}
            for side in SIDES:
                r[side] = summary_value(sel, side, "peak_strain_pct_mean")
                r[f"{side}_lo"] = summary_value(sel, side, "peak_strain_p5_pct_mean")
                r[f"{side}_hi"] = summary_value(sel, side, "peak_strain_p95_pct_mean")
                stretch_values += [r[side], r[f"{side}_lo"], r[f"{side}_hi"]]
            si_values.append(r["si"])
            rows.append(r)
        minis[athlete] = rows
    finite = np.array([v for v in stretch_values if math.isfinite(v)])
    lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    pad = 0.05 * (hi - lo) if hi > lo else 1.0
    si_finite = np.abs([v for v in si_values if math.isfinite(v)])
    si_limit = max(2.0 * band, 1.1 * float(si_finite.max()) if si_finite.size else 0.0)

    links = {a: f"athletes/{quote(files[a])}.html" for a in names}
    table_rows, latest_flag_rows, earlier = [], [], []
    for athlete in names:
        summ = groups["summary"].get(athlete, empty_like(summary))
        fl = groups["flags"].get(athlete, empty_like(flags))
        lat = latest_groups.get(athlete, empty_like(summary))
        sessions = sessions_in_order(summ["session"]) if len(summ) else sessions_in_order(
            groups["strides"].get(athlete, empty_like(strides)).get("session", []))
        latest = sessions[-1] if sessions else ""
        info = athlete_info(athletes, athlete)
        fl_latest = fl[fl["session"].astype(str) == latest] if len(fl) else fl
        fl_earlier = fl[fl["session"].astype(str) != latest] if len(fl) else fl
        speed = column(lat, "speed_m_s").to_numpy(dtype=float)
        bflh = lat[lat["muscle"].astype(str) == "biceps_femoris_long"] if len(lat) else lat
        si = first_finite(bflh, "peak_strain_symmetry_index_pct") if len(bflh) else math.nan
        mini_text = "; ".join(
            f"{muscle_label(r['muscle'])} L {fmt(r['left'], 1)} R {fmt(r['right'], 1)} SI {fmt(r['si'], 1)}"
            for r in minis[athlete]) or "–"
        picture = mini_geometry(minis[athlete], (lo - pad, hi + pad), si_limit, band) if minis[athlete] else None
        has_timeline = (out_dir / f"timeline_{files[athlete]}.html").exists() and len(sessions) > 1
        names_latest = sorted({str(f) for f in fl_latest.get("flag", [])})
        flags_text = (f"{len(fl_latest)}: {', '.join(names_latest)}" if len(fl_latest) else "none")
        if len(fl_earlier):
            flags_text += f" ({plural(len(fl_earlier), 'flag')} in earlier sessions)"
        involved = info.get("involved_side")
        table_rows.append(Row((
            words(athlete, href=links[athlete]), words(latest or "–"),
            number(len(sessions), 0, str(len(sessions))),
            words("–" if missing(involved) or not str(involved).strip() else involved),
            number(float(np.nanmean(speed)) if np.isfinite(speed).any() else math.nan, 2),
            Cell(mini_text, title=mini_text, picture=picture),
            number(si, 1), Cell(flags_text, str(len(fl_latest)), False, None, True),
            words("PDF", href=f"athletes/{quote(files[athlete])}.pdf"),
            words("timeline" if has_timeline else "–",
                  href=f"timeline_{quote(files[athlete])}.html" if has_timeline else None)),
            flagged=bool(len(fl_latest))))
        latest_flag_rows += flag_rows(fl_latest, athlete_links=links)
        if len(fl_earlier):
            earlier.append((f"{athlete}: {earlier_flags_line(fl, latest)}",
                            flag_rows(fl_earlier, athlete_links=links)))
    headers_files = [(name, name) for name in TABLE_FILES if (out_dir / name).exists()]
    version = str(run_info_get(run_info, "software_version", "version", default="unknown"))
    generated = str(run_info_get(run_info, "generated", "created",
                                 default=time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())))
    muscles_note = ("The picture shows " + ", ".join(muscle_label(m) for m in flag_muscles)
                    + " (the muscles the stretch flags look at; BFlh, the biceps femoris long head, is the hamstring "
                      "most often strained in sprinting): on the left each side's peak stretch (circle = left, "
                      "triangle = right, bar = model range 5–95 %) on one scale for the whole squad, from "
                      f"{lo - pad:.1f} % to {hi + pad:.1f} %; on the right each muscle's symmetry index against the "
                      f"shaded ±{band:g} % zone (scale ±{si_limit:.0f} %; a bold outline = beyond the zone).")
    return squad_page(table_rows, latest_flag_rows, earlier, len(names), generated, version, headers_files,
                      failed_rows(run_info), run_info, muscles_note)
