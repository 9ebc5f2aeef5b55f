"""The report's pictures, drawn with matplotlib's Agg canvas once each and kept as PNG bytes for HTML and PDF.

Our own look: late swing is a hatched ribbon along the top of each panel with the late-swing part of every curve
drawn bold; toe-off is a small caret on the time axis. Sides differ by colour, line style and marker; muscles take
the one palette of :mod:`hamstride.style` (column titles and markers), which shares no colour with the sides.
"""
from __future__ import annotations

import io
import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from ..numerics import SIDES
from ..style import (BAND_ALPHA, FLAG, GRID, MUSCLE_COLOUR, MUSCLE_GLYPH, REFERENCE, SIDE_COLOUR, SIDE_LINESTYLE, SIDE_MARKER,
                     TARGET_ZONE, muscle_style)
from .common import MUSCLE_NAMES, column, muscle_label, muscles_in_order, mpl_text

__all__ = ["RASTER_DPI", "FIGURE_COLUMNS", "Raster", "new_figure", "raster", "side_handles", "curve_stats", "window_of",
           "stretch_figure", "force_figure", "joint_figure", "LSI_STYLES", "timeline_figure", "mini_geometry"]

RASTER_DPI = 110  # one raster serves the HTML page (shown at 100 px per inch) and the PDF (about 120 ppi on A4)
_CYCLE_TICKS = (0, 25, 50, 75, 100)
_RIBBON = (0.93, 1.0)  # late-swing ribbon: top 7 % of each panel, in axes coordinates
_HATCH_COLOUR = "#5a5a5a"


@dataclass(frozen=True)
class Raster:
    """A figure drawn once: PNG bytes and its size in inches (the HTML shows it at 100 px per inch)."""

    png: bytes
    size_in: tuple[float, float]


def new_figure(width_in: float, height_in: float):
    from matplotlib.figure import Figure

    return Figure(figsize=(width_in, height_in), dpi=100)


@dataclass(eq=False)
class _Layout:
    """The fixed part of a kind of picture (axes, column and time-axis titles, time axis, legend), built once per
    process and kept. Each picture of that kind removes the previous picture's own artists and adds its own;
    :func:`raster` draws the fixed part once, keeps the pixels, and then draws only each picture's own artists
    over a copy of them (matplotlib's blitting, as its animation guide describes)."""

    fig: object
    axes: np.ndarray
    fixed: frozenset
    background: object = None
    background_dpi: float | None = None

    def own_artists(self, spines: bool = False) -> list:
        """The current picture's artists, in matplotlib's drawing order (axes in order, each by zorder; then the
        figure's own); ``spines``: with each axes' frame again at its zorder (drawn over the picture's lower
        artists, as in a full drawing)."""
        out = []
        for ax in self.fig.axes:
            mine = [a for a in (*ax.collections, *ax.patches, *ax.lines, *ax.texts) if id(a) not in self.fixed]
            if spines:
                mine += ax.spines.values()
            out += sorted(mine, key=lambda a: a.get_zorder())
        mine = [a for a in (*self.fig.lines, *self.fig.patches, *self.fig.texts) if id(a) not in self.fixed]
        return out + sorted(mine, key=lambda a: a.get_zorder())

    def clear(self) -> None:
        for artist in self.own_artists():
            artist.remove()
        for ax in {id(a): a for a in self.axes.flat}.values():  # a spanning panel appears more than once
            ax.relim()  # forget the previous picture's data limits
            ax.set_autoscaley_on(True)


_LAYOUTS: dict[tuple, _Layout] = {}
_LAYOUT_OF_FIGURE: dict[int, _Layout] = {}


def _layout(key: tuple, build) -> _Layout:
    """The kept layout for ``key`` (built by ``build() -> (fig, axes)`` the first time), cleared for a new picture.
    The figure is the same object for every picture of the layout: raster a picture before drawing the next."""
    layout = _LAYOUTS.get(key)
    if layout is None:
        fig, axes = build()
        fixed = [*fig.lines, *fig.patches, *fig.texts, *fig.legends]
        for ax in fig.axes:
            fixed += ax.get_children()
        layout = _LAYOUTS[key] = _Layout(fig, axes, frozenset(map(id, fixed)))
        _LAYOUT_OF_FIGURE[id(fig)] = layout
    else:
        layout.clear()
    return layout


def raster(fig, dpi: int = RASTER_DPI) -> Raster:
    """Draw ``fig`` once with Agg and keep the PNG (reused by the page and the PDF). A kept layout's fixed part is
    drawn only for its first picture; later pictures draw their own artists over a copy of its pixels."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image

    canvas = fig.canvas if isinstance(fig.canvas, FigureCanvasAgg) else FigureCanvasAgg(fig)
    fig.set_dpi(dpi)
    layout = _LAYOUT_OF_FIGURE.get(id(fig))
    if layout is None:
        canvas.draw()
    else:
        own = layout.own_artists()
        if layout.background is None or layout.background_dpi != dpi:
            for artist in own:
                artist.set_visible(False)
            canvas.draw()
            layout.background, layout.background_dpi = canvas.copy_from_bbox(fig.bbox), dpi
            for artist in own:
                artist.set_visible(True)
        for ax in fig.axes:
            ax.get_xlim(), ax.get_ylim()  # settle any pending autoscaling before drawing into the axes
        canvas.restore_region(layout.background)
        renderer = canvas.get_renderer()
        for artist in layout.own_artists(spines=True):
            artist.draw(renderer)
    rgb = np.asarray(canvas.buffer_rgba())[..., :3]
    buffer = io.BytesIO()
    Image.fromarray(rgb).save(buffer, format="PNG", compress_level=1)
    width, height = fig.get_size_inches()
    return Raster(buffer.getvalue(), (float(width), float(height)))


def _margins(fig, *, top_in: float, left_in: float, bottom_in: float, right_in: float = 0.15,
             wspace: float = 0.08, hspace: float = 0.12) -> None:
    """Fixed margins in inches (much faster than tight_layout, which draws the figure once more)."""
    width, height = fig.get_size_inches()
    fig.subplots_adjust(left=left_in / width, right=1 - right_in / width, bottom=bottom_in / height,
                        top=1 - top_in / height, wspace=wspace, hspace=hspace)


def _title(fig, title: str) -> None:
    """The picture's title on the first line, above the legend (never overlapping the plots)."""
    width, height = fig.get_size_inches()
    fig.text(0.1 / width, 1 - 0.08 / height, mpl_text(title), fontsize=10.5, va="top", ha="left")


def _legend_place(fig, ncol: int) -> dict:
    """Legend keywords: below the title, above the plots."""
    width, height = fig.get_size_inches()
    return {"loc": "upper left", "bbox_to_anchor": (0.1 / width, 1 - 0.33 / height), "ncol": ncol, "fontsize": 7.5,
            "frameon": False, "borderaxespad": 0.0, "handlelength": 2.6}


_TICK_PT, _TICK_PAD_PT, _LABEL_PAD_PT, _TICK_FONT = 3.5, 3.5, 4.0, 7.5  # matplotlib's default tick geometry


def _tick_labels(values: Sequence[float], limits: tuple[float, float]) -> list[str]:
    """Tick labels as matplotlib's default formatter writes them (same decimals for all, a true minus sign)."""
    from matplotlib.ticker import ScalarFormatter

    formatter = ScalarFormatter(useOffset=False)
    formatter.create_dummy_axis()
    formatter.axis.set_view_interval(*limits)
    return [mpl_text(s) for s in formatter.format_ticks(list(values))]


def _text_width_pt(texts: Sequence[str], size: float) -> float:
    from matplotlib.font_manager import FontProperties
    from matplotlib.textpath import text_to_path

    font = FontProperties(size=size)
    return max((text_to_path.get_text_width_height_descent(t, font, ismath=False)[0] for t in texts), default=0.0)


def _time_axis(ax, *, labels: bool) -> None:
    """Gait-cycle axis 0-100 %: grid lines, and on the bottom row tick marks, tick labels and the axis title.

    Drawn as one line collection, one marker line and one text per label where matplotlib's tick objects would be
    (five artists per tick, which dominate drawing time), with matplotlib's default geometry: 3.5 pt outward marks,
    labels 3.5 pt beyond them, the axis title 4 pt beyond the labels."""
    from matplotlib.markers import TICKDOWN
    from matplotlib.ticker import NullLocator
    from matplotlib.transforms import offset_copy

    ax.set_xlim(0, 100)
    ax.xaxis.set_major_locator(NullLocator())
    ax.yaxis.set_major_locator(NullLocator())
    where = ax.get_xaxis_transform()
    _rules(ax, _CYCLE_TICKS, vertical=True, color=GRID, lw=0.5, zorder=1.5)
    if labels:
        offset = _TICK_PT + _TICK_PAD_PT
        _line(ax, _CYCLE_TICKS, [0.0] * len(_CYCLE_TICKS), transform=where, marker=TICKDOWN, markersize=_TICK_PT,
              markeredgewidth=0.8, color="black", ls="none", clip_on=False, limits=False)
        below = offset_copy(where, ax.figure, y=-offset, units="points")
        for v, text in zip(_CYCLE_TICKS, _tick_labels(_CYCLE_TICKS, (0, 100))):
            ax.text(v, 0.0, text, transform=below, ha="center", va="top", fontsize=_TICK_FONT, clip_on=False)
        ax.set_xlabel("gait cycle (%)", fontsize=8.5)
        ax.xaxis.set_label_coords(0.5, 0.0, transform=offset_copy(
            ax.transAxes, ax.figure, y=-(offset + 1.2 * _TICK_FONT + _LABEL_PAD_PT), units="points"))


def _value_axis(ax, values: Sequence[float], *, labels: bool, title: str | None = None) -> None:
    """A picture's value axis (call once its limits are final): grid lines, and where ``labels`` tick marks, tick
    labels and the rotated axis title, drawn as :func:`_time_axis` draws the time axis."""
    from matplotlib.markers import TICKLEFT
    from matplotlib.ticker import NullLocator
    from matplotlib.transforms import offset_copy

    ax.yaxis.set_major_locator(NullLocator())
    values = list(values)
    where = ax.get_yaxis_transform()
    if values:
        _rules(ax, values, vertical=False, color=GRID, lw=0.5, zorder=1.5)
    if not labels:
        return
    offset = _TICK_PT + _TICK_PAD_PT
    texts = _tick_labels(values, ax.get_ylim()) if values else []
    if values:
        _line(ax, [0.0] * len(values), values, transform=where, marker=TICKLEFT, markersize=_TICK_PT,
              markeredgewidth=0.8, color="black", ls="none", clip_on=False, limits=False)
        left = offset_copy(where, ax.figure, x=-offset, units="points")
        for v, text in zip(values, texts):
            ax.text(0.0, v, text, transform=left, ha="right", va="center_baseline", fontsize=_TICK_FONT,
                    clip_on=False)
    if title:
        beside = offset_copy(ax.transAxes, ax.figure, x=-(offset + _text_width_pt(texts, _TICK_FONT) + _LABEL_PAD_PT),
                             units="points")
        ax.text(0.0, 0.5, title, transform=beside, rotation=90, rotation_mode="anchor", ha="center", va="bottom",
                fontsize=8.5, clip_on=False)


def _y_ticks(lo: float, hi: float, nbins: int = 5) -> list[float]:
    from matplotlib.ticker import MaxNLocator

    return [float(v) for v in MaxNLocator(nbins=nbins).tick_values(lo, hi) if lo <= v <= hi]


def side_handles(*, band: bool = True, peak: bool = True, window: bool = True) -> list:
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles = [Line2D([], [], color=SIDE_COLOUR[s], ls=SIDE_LINESTYLE[s], marker=SIDE_MARKER[s], label=f"{s} (mean)")
               for s in SIDES]
    if band:
        handles.append(Patch(facecolor="#888888", alpha=BAND_ALPHA, label="± SD across strides"))
    if window:
        handles.append(Patch(facecolor="none", edgecolor=_HATCH_COLOUR, hatch="////", lw=0,
                             label="late swing (curve drawn bold)"))
        handles.append(Line2D([], [], color="#333333", marker=10, ls="none", markersize=7, label="toe-off"))
    if peak:
        handles.append(Line2D([], [], color="black", marker="*", ls="none", markersize=9,
                              label="mean of stride peaks, bar = model range 5–95 %"))
    return handles


def curve_stats(curves: pd.DataFrame, columns: Sequence[str]) -> dict[tuple[str, str, str], tuple]:
    """Mean and SD over strides per side, muscle and percent of cycle: {(side, muscle, column): (pct, mean, sd)}."""
    cols = [c for c in columns if c in curves.columns]
    if not cols or len(curves) == 0:
        return {}
    data = curves[["side", "muscle", "pct", *cols]].copy()
    data["side"], data["muscle"] = data["side"].astype(str), data["muscle"].astype(str)
    data[cols] = data[cols].apply(pd.to_numeric, errors="coerce")
    grouped = data.groupby(["side", "muscle", "pct"], sort=True)[cols]
    mean, sd = grouped.mean(), grouped.std()
    out = {}
    for (side, muscle), block in mean.groupby(level=[0, 1], sort=False):
        pct = block.index.get_level_values(2).to_numpy(dtype=float)
        sd_block = sd.loc[block.index]
        for col in cols:
            out[(side, muscle, col)] = (pct, block[col].to_numpy(dtype=float), sd_block[col].to_numpy(dtype=float))
    return out


def _stride_means(strides: pd.DataFrame, columns: Sequence[str | None]) -> dict[tuple[str, str], dict[str, float]]:
    """Mean over strides of each column per (side, muscle) (NaN where a column has no value)."""
    cols = sorted({c for c in columns if c} & set(strides.columns))
    if len(strides) == 0 or not {"side", "muscle"} <= set(strides.columns) or not cols:
        return {}
    values = strides[cols].apply(pd.to_numeric, errors="coerce")
    means = values.groupby([strides["side"].astype(str), strides["muscle"].astype(str)], sort=False).mean()
    return {(str(k[0]), str(k[1])): row for k, row in zip(means.index, means.to_dict("records"))}


def _line(ax, x, y, *, limits: bool = True, **style):
    """A Line2D added to ``ax`` (what ``ax.plot`` makes, without its argument parsing); ``limits=False``: one that
    must not widen the data limits (grid lines, tick marks: the axis limits are set before them)."""
    from matplotlib.lines import Line2D

    line = Line2D(x, y, **style)
    return ax.add_line(line) if limits else ax.add_artist(line)


def _rules(ax, values: Sequence[float], *, vertical: bool, **style) -> None:
    """Full-height (``vertical``) or full-width lines at ``values``, as one line broken by NaN gaps."""
    values = list(values)
    if not values:
        return
    along = np.tile([0.0, 1.0, np.nan], len(values))
    at = np.repeat(np.asarray(values, dtype=float), 3)
    if vertical:
        _line(ax, at, along, transform=ax.get_xaxis_transform(), solid_capstyle="butt", limits=False, **style)
    else:
        _line(ax, along, at, transform=ax.get_yaxis_transform(), solid_capstyle="butt", limits=False, **style)


def _band(ax, x: np.ndarray, low: np.ndarray, high: np.ndarray, **style) -> None:
    """The area between two curves, as ``fill_between`` draws it (one polygon where both are finite throughout)."""
    if not (np.isfinite(low).all() and np.isfinite(high).all()):
        ax.fill_between(x, low, high, **style)
        return
    from matplotlib.patches import Polygon

    outline = np.concatenate([np.column_stack([x, low]), np.column_stack([x[::-1], high[::-1]])])
    ax.add_artist(Polygon(outline, closed=True, **style))  # add_patch would walk the outline point by point
    ax.update_datalim(outline)


def _nanmean_of(df: pd.DataFrame | None, name: str | None) -> float:
    if df is None or name is None or len(df) == 0:
        return math.nan
    v = column(df, name).to_numpy(dtype=float)
    return float(np.nanmean(v)) if np.isfinite(v).any() else math.nan


def window_of(strides: pd.DataFrame) -> tuple[dict[str, float], dict[str, float]]:
    """Per side: mean late-swing start and mean toe-off (% of the gait cycle), NaN where unknown."""
    starts, toe_offs = {}, {}
    for side in SIDES:
        sel = strides[strides["side"].astype(str) == side] if "side" in strides.columns else strides.iloc[:0]
        starts[side] = _nanmean_of(sel, "late_swing_start_pct")
        toe_offs[side] = _nanmean_of(sel, "toe_off_pct")
    return starts, toe_offs


def _mark_window(ax, starts: Mapping[str, float], toe_offs: Mapping[str, float], label: bool) -> None:
    """Late swing: a hatched ribbon along the top of the panel; toe-off: a caret on the time axis (per side)."""
    from matplotlib.patches import Rectangle

    trans = ax.get_xaxis_transform()  # x in data, y in axes coordinates (cached by the axes)
    finite = [v for v in starts.values() if math.isfinite(v)]
    if finite:
        start = float(np.mean(finite))
        ax.add_artist(Rectangle((start, _RIBBON[0]), 100.0 - start, _RIBBON[1] - _RIBBON[0], transform=trans,
                                facecolor="white", edgecolor=_HATCH_COLOUR, hatch="////", lw=0.6, zorder=1))
        if label:
            ax.text(0.5 * (start + 100.0), 0.5 * (_RIBBON[0] + _RIBBON[1]), "late swing", transform=trans,
                    ha="center", va="center", fontsize=6.5, color="#222222", zorder=7,
                    bbox={"facecolor": "white", "edgecolor": "none", "pad": 0.6})
    for side in SIDES:
        value = toe_offs.get(side, math.nan)
        if math.isfinite(value):
            _line(ax, [value], [0.0], transform=trans, marker=10, markersize=7, color=SIDE_COLOUR[side],
                  markeredgecolor="black", markeredgewidth=0.4, ls="none", clip_on=False, zorder=6)
    if label:
        toes = [v for v in toe_offs.values() if math.isfinite(v)]
        if toes:
            ax.text(float(np.mean(toes)) + 1.5, 0.03, "toe-off", transform=trans, ha="left", va="bottom",
                    fontsize=6.5, color="#333333")


def _plot_side_curves(ax, stats: Mapping, muscle: str, col: str, starts: Mapping[str, float]) -> dict[str, tuple]:
    """Mean ± SD per side, the late-swing part drawn bold; returns per side the (pct, mean) arrays drawn."""
    drawn = {}
    for side in SIDES:
        if (side, muscle, col) not in stats:
            continue
        pct, mv, sv = stats[(side, muscle, col)]
        if not np.isfinite(mv).any():
            continue
        colour = SIDE_COLOUR[side]
        sv = np.nan_to_num(sv)
        _band(ax, pct, mv - sv, mv + sv, color=colour, alpha=BAND_ALPHA, lw=0, zorder=2)
        _line(ax, pct, mv, color=colour, ls=SIDE_LINESTYLE[side], lw=1.1, marker=SIDE_MARKER[side], markersize=3.2,
              markevery=max(1, len(pct) // 10), zorder=3)
        start = starts.get(side, math.nan)
        if math.isfinite(start):
            late = pct >= start
            _line(ax, pct[late], mv[late], color=colour, ls=SIDE_LINESTYLE[side], lw=2.6, zorder=3.5)
        drawn[side] = (pct, mv)
    return drawn


def _mark_peaks(ax, drawn: Mapping[str, tuple], means: Mapping, muscle: str, value_col: str | None,
                low_col: str | None, high_col: str | None, time_col: str | None) -> None:
    """Star at the mean of the stride peaks (at their mean time), with the model range as a vertical bar."""
    for side, (pct, mv) in drawn.items():
        mean = means.get((side, muscle), {})
        peak_time = mean.get(time_col, math.nan)
        if not math.isfinite(peak_time):
            peak_time = float(pct[int(np.nanargmax(mv))])
        peak_value = mean.get(value_col, math.nan)
        if not math.isfinite(peak_value):
            peak_value = float(np.nanmax(mv))
        lo, hi = mean.get(low_col, math.nan), mean.get(high_col, math.nan)
        if math.isfinite(lo) and math.isfinite(hi):
            _line(ax, [peak_time, peak_time], [lo, hi], color=SIDE_COLOUR[side], lw=2.2, solid_capstyle="butt",
                  zorder=4)
        _line(ax, [peak_time], [peak_value], marker="*", markersize=10, color=SIDE_COLOUR[side],
              markeredgecolor="black", markeredgewidth=0.6, ls="none", zorder=5)


def _muscle_title(ax, muscle: str) -> None:
    """Column title in the muscle's palette colour led by its marker glyph, the same in every figure."""
    ax.set_title(mpl_text(f"{MUSCLE_GLYPH.get(muscle, '●')} {MUSCLE_NAMES.get(muscle, muscle)}"), fontsize=9,
                 color=MUSCLE_COLOUR.get(muscle, "#444444"), fontweight="bold")


_STRETCH_ROWS = (
    ("strain_pct", "stretch vs upright (%)", "peak_strain_pct", "peak_strain_p5_pct", "peak_strain_p95_pct",
     "peak_strain_time_pct"),
    # rigid tendon: fibre length rises with musculotendon length, so its late-swing peak comes with the strain peak
    ("fibre_length_lopt", "fibre length l/l_opt (–)", "peak_fibre_length_lopt", "peak_fibre_length_lopt_p5",
     "peak_fibre_length_lopt_p95", "peak_strain_time_pct"),
    ("velocity_lopt_per_s", "lengthening velocity (l_opt/s)", None, None, None, None),
)
_FORCE_ROWS = (("force_n", "muscle force (N)"), ("power_w", "muscle power (W)"))
_JOINT_COLUMNS = ("hip_flexion_deg", "knee_flexion_deg")
#: the curve columns the athlete's gait-cycle pictures show (one :func:`curve_stats` call serves them all)
FIGURE_COLUMNS = tuple(r[0] for r in _STRETCH_ROWS) + tuple(r[0] for r in _FORCE_ROWS) + _JOINT_COLUMNS


def _grid_layout(kind: str, rows: Sequence[tuple[str, str]], muscles: Sequence[str], height_in: float,
                 handles, ncol: int) -> _Layout:
    """The kept layout of a muscle grid: one column per muscle, one row per curve column, legend above."""
    def build():
        fig = new_figure(2.7 * max(1, len(muscles)) + 0.6, height_in)
        axes = fig.subplots(len(rows), max(1, len(muscles)), squeeze=False)
        for j, muscle in enumerate(muscles):
            _muscle_title(axes[0, j], muscle)
        for i in range(axes.shape[0]):
            for j in range(axes.shape[1]):
                _time_axis(axes[i, j], labels=i == axes.shape[0] - 1)
        fig.legend(handles=handles(), **_legend_place(fig, ncol))
        _margins(fig, top_in=1.0, left_in=0.75, bottom_in=0.5, hspace=0.1)
        return fig, axes

    return _layout((kind, tuple(rows), tuple(muscles), height_in, ncol, tuple(h.get_label() for h in handles())),
                   build)


def _muscle_grid(layout: _Layout, rows: Sequence[tuple[str, str]], muscles: Sequence[str], curves: pd.DataFrame,
                 strides: pd.DataFrame, decorate, stats: Mapping | None) -> np.ndarray:
    """Left and right overlaid in each panel of a grid layout, one y range per row, late swing marked."""
    if stats is None:
        stats = curve_stats(curves, [r[0] for r in rows])
    starts, toe_offs = window_of(strides)
    axes = layout.axes
    for j, muscle in enumerate(muscles):
        for i, (col, _) in enumerate(rows):
            ax = axes[i, j]
            drawn = _plot_side_curves(ax, stats, muscle, col, starts)
            decorate(ax, col, muscle, drawn)
            if not drawn:
                ax.text(0.5, 0.5, "no data", transform=ax.transAxes, ha="center", va="center", color="#777777")
    _share_rows(axes, [r[1] for r in rows])
    for i in range(axes.shape[0]):
        for j in range(axes.shape[1]):
            _mark_window(axes[i, j], starts, toe_offs, label=(i == 0 and j == 0))
    return axes


def _share_rows(axes: np.ndarray, titles: Sequence[str]) -> None:
    """One y range per row (room at the top for the late-swing ribbon), as shared axes would give; tick labels and
    the row's title on the left column only, grid lines in every panel."""
    n_rows, n_cols = axes.shape
    for i in range(n_rows):
        for j in range(n_cols):
            axes[i, j].autoscale_view(scalex=False)  # the artists were added directly, without ax.plot's request
        limits = np.array([axes[i, j].get_ylim() for j in range(n_cols)])
        lo, hi = float(limits[:, 0].min()), float(limits[:, 1].max())
        hi += 0.14 * (hi - lo)
        y_grid = _y_ticks(lo, hi)
        for j in range(n_cols):
            axes[i, j].set_ylim(lo, hi)
            _value_axis(axes[i, j], y_grid, labels=j == 0, title=titles[i] if j == 0 else None)


def stretch_figure(curves: pd.DataFrame, strides: pd.DataFrame, muscles: Sequence[str], title: str, *,
                   compact: bool = False, stats: Mapping | None = None):
    """Stretch, fibre length and lengthening velocity per muscle (``compact``: the stretch row only).

    ``stats``: :func:`curve_stats` of ``curves`` already taken (over :data:`FIGURE_COLUMNS`, shared by the
    athlete's pictures); by default they are taken here."""
    rows = _STRETCH_ROWS[:1] if compact else _STRETCH_ROWS
    peaks = {r[0]: r[2:] for r in rows}
    groups = _stride_means(strides, [c for r in rows for c in r[2:]])

    def decorate(ax, col, muscle, drawn):
        if col == "fibre_length_lopt":
            ax.axhline(1.0, color=REFERENCE, ls=":", lw=1.0, zorder=1)
            ax.text(1.5, 1.0, "optimal length", fontsize=6.5, color=REFERENCE, va="bottom")
        if col == "velocity_lopt_per_s":
            ax.axhline(0.0, color=REFERENCE, ls="-", lw=0.6, zorder=1)
        if drawn:
            _mark_peaks(ax, drawn, groups, muscle, *peaks[col])

    grid_rows = [r[:2] for r in rows]
    layout = _grid_layout("stretch", grid_rows, muscles, 3.4 if compact else 7.0, side_handles, 3)
    _muscle_grid(layout, grid_rows, muscles, curves, strides, decorate, stats)
    _title(layout.fig, title)
    return layout.fig


def force_figure(curves: pd.DataFrame, strides: pd.DataFrame, muscles: Sequence[str], title: str, *,
                 stats: Mapping | None = None):
    from matplotlib.lines import Line2D

    groups = _stride_means(strides, ["peak_force_n", "peak_force_n_p5", "peak_force_n_p95"])

    def decorate(ax, col, muscle, drawn):
        if col == "force_n" and drawn:
            _mark_peaks(ax, drawn, groups, muscle, "peak_force_n", "peak_force_n_p5", "peak_force_n_p95", None)
        if col == "power_w":
            ax.axhline(0.0, color=REFERENCE, ls="-", lw=0.6, zorder=1)

    has_band = {"peak_force_n_p5", "peak_force_n_p95"} <= set(strides.columns)

    def handles():
        return side_handles(peak=False) + [Line2D(
            [], [], color="black", marker="*", ls="none", markersize=9,
            label="mean of stride peak forces" + (", bar = model range 5–95 %" if has_band else ""))]

    layout = _grid_layout("force", _FORCE_ROWS, muscles, 5.0, handles, 3)
    _muscle_grid(layout, _FORCE_ROWS, muscles, curves, strides, decorate, stats)
    _title(layout.fig, title)
    return layout.fig


def joint_figure(curves: pd.DataFrame, strides: pd.DataFrame, title: str, *, stats: Mapping | None = None):
    """Hip and knee flexion (one muscle's rows suffice: the joint angles are shared by all muscles)."""
    cols = _JOINT_COLUMNS
    first = muscles_in_order(curves["muscle"].unique())[:1]
    if stats is None:
        one = curves[curves["muscle"].astype(str).isin(first)]
        stats = curve_stats(one, [c for c in cols if c in curves.columns])
    starts, toe_offs = window_of(strides)
    def build():
        fig = new_figure(9.0, 2.9)
        axes = fig.subplots(1, 2, squeeze=False)
        for ax in axes.flat:
            _time_axis(ax, labels=True)
        fig.legend(handles=side_handles(peak=False), **_legend_place(fig, 5))
        _margins(fig, top_in=0.75, left_in=0.75, bottom_in=0.5, wspace=0.25)
        return fig, axes

    layout = _layout(("joints",), build)
    labels = {"hip_flexion_deg": "hip flexion (deg)", "knee_flexion_deg": "knee flexion (deg)"}
    for k, (ax, col) in enumerate(zip(layout.axes[0], cols)):
        drawn = _plot_side_curves(ax, stats, first[0] if first else "", col, starts)
        if not drawn:
            ax.text(0.5, 0.5, "no data", transform=ax.transAxes, ha="center", va="center", color="#777777")
        ax.axhline(0.0, color=REFERENCE, lw=0.6)
        ax.autoscale_view(scalex=False)
        lo, hi = ax.get_ylim()
        hi += 0.14 * (hi - lo)
        ax.set_ylim(lo, hi)
        _value_axis(ax, _y_ticks(lo, hi), labels=True, title=labels[col])
        _mark_window(ax, starts, toe_offs, label=(k == 0))
    _title(layout.fig, title)
    return layout.fig


# ----------------------------------------------------------------------------------------------------------------
# timeline


_TIMELINE_ROWS = (
    ("peak_strain_pct_mean", "peak stretch (%)"),
    ("peak_fibre_length_lopt_mean", "peak l/l_opt (–)"),
    ("negative_work_j_mean", "negative work (J)"),
)
_MIN_SPAN = {"speed_m_s": 1.0, "peak_strain_pct_mean": 2.0, "peak_fibre_length_lopt_mean": 0.1,
             "negative_work_j_mean": 5.0}
LSI_STYLES = (("-", "s", "#222222", "LSI of peak stretch"), (":", "P", "#666666", "LSI of negative work"))


def _min_span(ax, values: np.ndarray, span: float) -> None:
    """Give an axis at least ``span`` of range around its data, so small changes are not magnified."""
    finite = np.asarray(values, dtype=float)
    finite = finite[np.isfinite(finite)]
    if not finite.size:
        return
    lo, hi = float(finite.min()), float(finite.max())
    pad = 0.1 * (hi - lo)
    if hi - lo + 2 * pad < span:
        mid = 0.5 * (lo + hi)
        ax.set_ylim(mid - span / 2, mid + span / 2)
    else:
        ax.set_ylim(lo - pad, hi + pad)


def _session_axis(ax, x: np.ndarray, labels: Sequence[str] | None, *, fontsize: float = _TICK_FONT,
                  rotation: float = 0.0, ha: str = "center") -> None:
    """Sessions along x: grid lines, and where ``labels`` are given tick marks and labels (drawn as
    :func:`_time_axis` draws the gait-cycle axis; rotated labels are aligned as matplotlib aligns them)."""
    from matplotlib.markers import TICKDOWN
    from matplotlib.ticker import NullLocator
    from matplotlib.transforms import offset_copy

    ax.xaxis.set_major_locator(NullLocator())
    _rules(ax, x, vertical=True, color=GRID, lw=0.5, zorder=1.5 if labels is not None else 0.5)
    if labels is None:
        return
    where = ax.get_xaxis_transform()
    _line(ax, x, np.zeros(len(x)), transform=where, marker=TICKDOWN, markersize=_TICK_PT, markeredgewidth=0.8,
          color="black", ls="none", clip_on=False, limits=False)
    below = offset_copy(where, ax.figure, y=-(_TICK_PT + _TICK_PAD_PT), units="points")
    for v, text in zip(x, labels):
        ax.text(v, 0.0, text, transform=below, ha=ha, va="top", rotation=rotation, fontsize=fontsize, clip_on=False)


def timeline_figure(tl: pd.DataFrame, athlete: str, sessions: Sequence[str], xlabels: Sequence[str],
                    muscles: Sequence[str], lsi_cols: Sequence[str], x_title: str, lsi_line: float = 90.0):
    """Speed on top, then per muscle (columns) peak stretch, peak l/l_opt, negative work and LSI per session."""
    from matplotlib.gridspec import GridSpec
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    n = max(1, len(muscles))
    nrows = 1 + len(_TIMELINE_ROWS) + 1
    width, height = 2.8 * n + 0.9, 1.6 * nrows + 1.6

    def build():
        fig = new_figure(width, height)
        grid = GridSpec(nrows, n, figure=fig, left=0.85 / width, right=1 - 0.15 / width, top=1 - 0.9 / height,
                        bottom=0.95 / height, hspace=0.5, wspace=0.12)
        axes = np.empty((nrows, n), dtype=object)
        axes[0, :] = [fig.add_subplot(grid[0, :])] * n  # the speed panel spans the columns
        axes[0, 0].set_title("running speed (mean of the session's strides)", fontsize=9, loc="left")
        for j, muscle in enumerate(muscles):
            for i in range(1, nrows):
                axes[i, j] = fig.add_subplot(grid[i, j])
            _muscle_title(axes[1, j], muscle)
        handles = side_handles(band=False, peak=False, window=False)
        handles += [Line2D([], [], color=c, ls=ls, marker=mk, label=lab)
                    for (ls, mk, c, lab), _ in zip(LSI_STYLES, lsi_cols)]
        handles.append(Line2D([], [], color=FLAG, ls="-.", label=f"LSI {lsi_line:g} %"))
        handles.append(Patch(facecolor=TARGET_ZONE, label=f"target zone: LSI ≥ {lsi_line:g} %"))
        fig.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.1 / width, 1 - 0.33 / height),
                   ncol=min(len(handles), 4 if n < 3 else 6), fontsize=7.5, frameon=False, borderaxespad=0.0)
        return fig, axes

    layout = _layout(("timeline", tuple(muscles), tuple(lsi_cols), lsi_line), build)
    fig, grid_axes = layout.fig, layout.axes
    x = np.arange(len(sessions))
    xlim = (-0.4, max(len(sessions) - 0.6, 0.4))
    data = tl.assign(session=tl["session"].astype(str), side=tl["side"].astype(str), muscle=tl["muscle"].astype(str))

    names = [c for c in ("speed_m_s", *(r[0] for r in _TIMELINE_ROWS), *lsi_cols) if c in data.columns]
    numbers = data[names].apply(pd.to_numeric, errors="coerce")
    means = {}  # (side or None, muscle or None) -> {name: {session: mean}}, one groupby per grouping
    for keys in (("session",), ("muscle", "session"), ("side", "muscle", "session")):
        grouped = numbers.groupby([data[k] for k in keys], sort=False).mean()
        for key, row in zip(grouped.index, grouped.to_dict("records")):
            key = key if isinstance(key, tuple) else (key,)
            where = (key[0] if len(keys) == 3 else None, key[-2] if len(keys) >= 2 else None)
            for name, value in row.items():
                means.setdefault(where, {}).setdefault(name, {})[key[-1]] = value

    def values(side: str | None, muscle: str | None, name: str) -> np.ndarray:
        """Session means of ``name`` over the rows of ``side`` and ``muscle`` (None: all), in session order."""
        found = means.get((side, muscle), {}).get(name, {})
        return np.array([found.get(s, np.nan) for s in sessions], dtype=float)

    labels = [mpl_text(v) for v in xlabels]
    ax = top = grid_axes[0, 0]
    speed = values(None, None, "speed_m_s")
    ax.plot(x, speed, color="#333333", marker="s")
    _min_span(ax, speed, _MIN_SPAN["speed_m_s"])
    ax.set_xlim(*xlim)
    _session_axis(ax, x, labels, fontsize=7.5)
    rows_axes: dict[int, list] = {}
    row_values: dict[int, list] = {}
    lsi_values: list[np.ndarray] = []
    for j, muscle in enumerate(muscles):
        for i, (col, label) in enumerate(_TIMELINE_ROWS, start=1):
            ax = grid_axes[i, j]
            rows_axes.setdefault(i, []).append(ax)
            vals = {side: values(side, muscle, col) for side in SIDES}
            row_values.setdefault(i, []).extend(vals.values())
            if any(np.isfinite(v).any() for v in vals.values()):
                for side in SIDES:
                    ax.plot(x, vals[side], color=SIDE_COLOUR[side], ls=SIDE_LINESTYLE[side], marker=SIDE_MARKER[side])
            else:
                ax.text(0.5, 0.5, "body mass missing" if col.startswith("negative") else "no data",
                        transform=ax.transAxes, ha="center", va="center", fontsize=7.5, color="#777777")
            if col == "peak_fibre_length_lopt_mean":
                ax.axhline(1.0, color=REFERENCE, ls=":", lw=1.0)
            ax.set_xlim(*xlim)
            _session_axis(ax, x, None)
        ax = grid_axes[nrows - 1, j]
        rows_axes.setdefault(nrows - 1, []).append(ax)
        ax.axhline(lsi_line, color=FLAG, ls="-.", lw=1.3, zorder=1)
        drew = False
        for (ls, mk, colour, _), col in zip(LSI_STYLES, lsi_cols):
            v = values(None, muscle, col)
            if np.isfinite(v).any():
                ax.plot(x, v, color=colour, ls=ls, marker=mk, zorder=3)
                lsi_values.append(v)
                drew = True
        if not drew:
            ax.text(0.5, 0.5, "LSI needs the injured side\nin athletes.csv", transform=ax.transAxes,
                    ha="center", va="center", fontsize=7.5, color="#777777")
        ax.set_xlim(*xlim)
        _session_axis(ax, x, labels, fontsize=6.5, rotation=30.0, ha="right")
    for i, axes in rows_axes.items():  # a minimum span per row, so noise is not blown up into a trend
        if i <= len(_TIMELINE_ROWS):
            _min_span(axes[0], np.concatenate(row_values.get(i, [np.array([np.nan])])),
                      _MIN_SPAN[_TIMELINE_ROWS[i - 1][0]])
        else:
            both = np.concatenate(lsi_values) if lsi_values else np.array([np.nan])
            finite = both[np.isfinite(both)]
            lo = min(lsi_line - 10.0, float(finite.min()) - 5) if finite.size else lsi_line - 10.0
            hi = max(lsi_line + 20.0, float(finite.max()) + 5) if finite.size else lsi_line + 20.0
            for ax in axes:
                ax.axhspan(lsi_line, hi, color=TARGET_ZONE, lw=0, zorder=0)
            axes[0].set_ylim(lo, hi)
        # one y range per row, as shared axes would give; tick labels on the left column only, grid lines in all
        limits = axes[0].get_ylim()
        ticks = _y_ticks(*limits, nbins=4)
        title = _TIMELINE_ROWS[i - 1][1] if i <= len(_TIMELINE_ROWS) else "LSI (%)"
        for k, ax in enumerate(axes):
            ax.set_ylim(*limits)
            _value_axis(ax, ticks, labels=k == 0, title=title if k == 0 else None)
    # the speed axis keeps matplotlib's automatic tick count for its height and label size (AutoLocator)
    from matplotlib.ticker import AutoLocator

    top.yaxis.set_tick_params(labelsize=_TICK_FONT)
    automatic = AutoLocator()
    automatic.set_axis(top.yaxis)
    lo, hi = top.get_ylim()
    _value_axis(top, [v for v in automatic.tick_values(lo, hi) if lo <= v <= hi], labels=True, title="speed (m/s)")
    fig.text(0.5, 0.12 / height, mpl_text(x_title), ha="center", va="bottom", fontsize=8.5)
    fig.text(0.1 / width, 1 - 0.08 / height, mpl_text(f"{athlete} · sessions in date order"), fontsize=10.5,
             va="top")
    return fig


def mini_geometry(rows: Sequence[dict], stretch_range: tuple[float, float], si_limit: float,
                  band: float) -> dict:
    """Coordinates (px) of the squad overview's small picture of one athlete, drawn by the index template as SVG.

    ``rows``: one dict per muscle with ``muscle``, ``left``, ``right``, ``left_lo``, ``left_hi``, ``right_lo``,
    ``right_hi`` (peak stretch and its model range, %) and ``si`` (symmetry index, %, NaN where undefined).
    Left part: peak stretch per side on the squad's common scale; right part: SI against the ±band zone.
    """
    width, row_h, label_w, stretch_w, gap, si_w = 300, 16, 34, 150, 14, 96
    lo, hi = stretch_range
    si0 = label_w + stretch_w + gap

    def sx(v: float) -> float:
        return round(label_w + 4 + (stretch_w - 8) * (v - lo) / (hi - lo), 1) if hi > lo else label_w + stretch_w / 2

    def six(v: float) -> float:
        v = max(-si_limit, min(si_limit, v))
        return round(si0 + si_w / 2 + (si_w / 2 - 4) * v / si_limit, 1)

    out_rows = []
    for k, r in enumerate(rows):
        y = 4 + k * row_h + row_h / 2
        sides = []
        for side in SIDES:
            value = r.get(side, math.nan)
            if not math.isfinite(value):
                continue
            lo_v, hi_v = r.get(f"{side}_lo", math.nan), r.get(f"{side}_hi", math.nan)
            dy = -3 if side == "left" else 3
            sides.append({"side": side, "x": sx(value), "y": round(y + dy, 1), "colour": SIDE_COLOUR[side],
                          "x0": sx(lo_v) if math.isfinite(lo_v) else None,
                          "x1": sx(hi_v) if math.isfinite(hi_v) else None})
        si = r.get("si", math.nan)
        out_rows.append({"y": y, "label": muscle_label(r["muscle"]), "colour": MUSCLE_COLOUR.get(r["muscle"], "#444"),
                         "marker": muscle_style(r["muscle"])["marker"], "sides": sides,
                         "si_x": six(si) if math.isfinite(si) else None, "si_outside": math.isfinite(si)
                         and abs(si) > band})
    height = 8 + row_h * max(1, len(rows))
    return {"width": width, "height": height, "rows": out_rows, "label_w": label_w, "stretch_x0": label_w,
            "stretch_w": stretch_w, "si_x0": si0, "si_w": si_w, "zone_x0": six(-band), "zone_x1": six(band),
            "si_mid": six(0.0), "colours": dict(SIDE_COLOUR), "zone_colour": TARGET_ZONE}
