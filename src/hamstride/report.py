"""Squad, athlete and timeline reports rendered from the exported tables.

This stage draws; it computes no biomechanics. It reads the tables of the export contract (strides, curves, flags,
summary, athletes) and writes self-contained HTML pages (images embedded as PNG data URIs, no script or style fetched
from anywhere, a Content-Security-Policy that blocks everything else) plus one PDF per athlete for sharing.

Safety rules: every piece of text that comes from folder names, file names, metadata or tables goes through
:func:`html.escape` before it reaches HTML, through :func:`_mpl_text` before it reaches a plot (no mathtext), and
through :func:`safe_component` before it becomes part of a path; every file is written to a temporary file in the
target folder and then moved into place with :func:`os.replace`.

Plot style: one palette of our own; left and right differ by colour *and* line style *and* marker, so the plots read
in greyscale print and for colour-blind readers.
"""
from __future__ import annotations

import base64
import hashlib
import functools
import html
import io
import math
import os
import re
import textwrap
import time
import unicodedata
from pathlib import Path
from types import MappingProxyType
from typing import Iterable, Mapping, Sequence
from urllib.parse import quote

import numpy as np
import pandas as pd

from .io import atomic_path, atomic_write_bytes

CAUTION = (
    "hamstride is a screening and monitoring aid, not a diagnosis; decisions about an athlete's care belong to "
    "qualified clinicians and local practice."
)

# Our own palette. Left: deep blue (dark in greyscale); right: amber (light in greyscale); blue/amber stay apart for
# the common red-green colour-vision deficiencies. Muscles get four hues that also differ in lightness.
PALETTE = MappingProxyType({
    "left": "#1b4f8a",
    "right": "#d9822b",
    "late_swing": "#d8d8d8",
    "band_alpha": 0.22,
    "reference": "#555555",
    "flag": "#a8322d",
    "ok": "#2f6b3a",
    "muscles": MappingProxyType({"biceps_femoris_long": "#1b4f8a", "semitendinosus": "#d9822b", "semimembranosus": "#6a3d7c", "biceps_femoris_short": "#3f9f8f"}),
})
LINESTYLE = MappingProxyType({"left": "-", "right": "--"})
MARKER = MappingProxyType({"left": "o", "right": "^"})
MUSCLE_MARKER = MappingProxyType({"biceps_femoris_long": "o", "semitendinosus": "s", "semimembranosus": "^", "biceps_femoris_short": "D"})

SIDES = ("left", "right")
MUSCLE_ORDER = ("biceps_femoris_long", "semitendinosus", "semimembranosus", "biceps_femoris_short")
MUSCLE_NAMES = MappingProxyType({
    "biceps_femoris_long": "biceps femoris long head (BFlh)",
    "semitendinosus": "semitendinosus (ST)",
    "semimembranosus": "semimembranosus (SM)",
    "biceps_femoris_short": "biceps femoris short head (BFsh)",
})
MUSCLE_SHORT = MappingProxyType({"biceps_femoris_long": "BFlh", "semitendinosus": "ST", "semimembranosus": "SM", "biceps_femoris_short": "BFsh"})

GLOSSARY = (
    ("gait cycle (%)", "0 % = foot strike of that leg, 100 % = its next foot strike."),
    ("toe-off", "the moment the foot leaves the ground; the leg swings from toe-off to the next foot strike."),
    ("late swing", "from peak knee flexion in swing to the next foot strike — when most sprint hamstring strains "
                   "happen (Kenneally-Dabrowski et al. 2019)."),
    ("stretch / strain (%)", "how much longer the muscle–tendon unit is than when standing upright, in % of its "
                             "upright length."),
    ("l/l_opt", "fibre length divided by its optimal length; active force only between about 0.5 and 1.5."),
    ("lengthening velocity (l_opt/s)", "how fast the fibres are being stretched, in optimal fibre lengths per "
                                       "second; positive = lengthening."),
    ("negative work (J)", "energy the muscle absorbs while it is stretched under load (braking the swinging lower "
                          "leg), in joules per stride."),
    ("mean ± SD", "average over strides ± standard deviation (the stride-to-stride spread)."),
    ("CV (%)", "coefficient of variation: SD as a percentage of the mean; smaller = more consistent strides."),
    ("SI (%)", "symmetry index: (right − left) ÷ their average × 100; 0 = symmetric, positive = right larger "
               "(Robinson et al. 1987)."),
    ("LSI (%)", "limb symmetry index: involved side ÷ uninvolved side × 100; 90 % or more is often suggested "
                "before return to sport."),
    ("model range (5–95 %)", "the range the peak could take when the model's assumed muscle dimensions vary within "
                             "their published spread (5th to 95th percentile)."),
)

FLAG_EXPLANATIONS = MappingProxyType({
    "side_asymmetry": "left and right differ by more than the set threshold.",
    "high_stretch": "peak stretch is above the set threshold.",
    "involved_side_guarding": "the previously injured side stretches clearly less than the other side, which may "
                              "mean the athlete is protecting it.",
    "few_strides": "too few strides to trust the averages.",
    "speed_low": "running speed below the set minimum; stretch and work depend on speed, so comparisons are "
                 "less fair.",
})

BODY_MASS_MISSING = "body mass missing: forces and work need it; add it to athletes.csv"

_DATE_PREFIX = re.compile(r"^(\d{4})-(\d{2})-(\d{2})")
_SAFE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,63}")
_WINDOWS_RESERVED = {"con", "prn", "aux", "nul", *(f"com{i}" for i in range(1, 10)), *(f"lpt{i}" for i in range(1, 10))}

_PAGE_SCRIPT = (
    "(function(){"
    "function key(c){var v=c.getAttribute('data-sort');if(v===null){v=c.textContent;}"
    "var n=parseFloat(v);return isNaN(n)?[1,v.toLowerCase()]:[0,n];}"
    "function cmp(a,b){if(a[0]!==b[0]){return a[0]-b[0];}return a[1]<b[1]?-1:(a[1]>b[1]?1:0);}"
    "function sortBy(th){var row=th.parentNode,table=th.closest('table'),body=table.tBodies[0];"
    "var i=Array.prototype.indexOf.call(row.children,th);var asc=th.getAttribute('aria-sort')!=='ascending';"
    "Array.prototype.forEach.call(row.children,function(h){h.removeAttribute('aria-sort');});"
    "th.setAttribute('aria-sort',asc?'ascending':'descending');"
    "var rows=Array.prototype.slice.call(body.rows);"
    "rows.sort(function(a,b){var r=cmp(key(a.cells[i]),key(b.cells[i]));return asc?r:-r;});"
    "rows.forEach(function(r){body.appendChild(r);});}"
    "document.querySelectorAll('table.sortable thead th').forEach(function(th){th.tabIndex=0;"
    "th.addEventListener('click',function(){sortBy(th);});"
    "th.addEventListener('keydown',function(e){if(e.key==='Enter'){sortBy(th);}});});"
    "function check(){var imgs=document.images,ok=true;"
    "for(var i=0;i<imgs.length;i++){if(!(imgs[i].complete&&imgs[i].naturalWidth>0)){ok=false;}}"
    "document.body.setAttribute('data-images',String(imgs.length));"
    "document.body.setAttribute('data-images-ok',ok?'true':'false');}"
    "if(document.readyState==='complete'){check();}else{window.addEventListener('load',check);}"
    "})();"
)
_SCRIPT_HASH = base64.b64encode(hashlib.sha256(_PAGE_SCRIPT.encode("utf-8")).digest()).decode("ascii")
_CSP = (f"default-src 'none'; img-src data:; style-src 'unsafe-inline'; script-src 'sha256-{_SCRIPT_HASH}'; "
        "base-uri 'none'; form-action 'none'")

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,'DejaVu Sans',sans-serif;margin:0 auto;max-width:1250px;
padding:0 18px 40px;color:#1d1d1d;line-height:1.4}
h1{font-size:1.6em;margin:.6em 0 .2em}h2{font-size:1.25em;margin:1.4em 0 .3em;border-bottom:1px solid #ccc}
.caution{border-left:6px solid #a8322d;background:#fbf1ef;padding:8px 12px;margin:10px 0}
.note{background:#f3f5f8;border-left:6px solid #1b4f8a;padding:6px 12px;margin:8px 0}
.explain{color:#444;font-size:.92em;margin:.2em 0 .6em}
table{border-collapse:collapse;font-size:.86em;margin:6px 0}
th,td{border:1px solid #c8c8c8;padding:3px 6px;text-align:left;vertical-align:top}
td{white-space:nowrap}td.msg{white-space:normal;min-width:18em}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
caption{text-align:left;caption-side:top}
thead th{background:#eef0f3}
table.sortable thead th{cursor:pointer}
table.sortable thead th[aria-sort=ascending]::after{content:' \\25B2'}
table.sortable thead th[aria-sort=descending]::after{content:' \\25BC'}
tr.flagged td:first-child{border-left:5px solid #a8322d}
.scroll{overflow-x:auto}
figure{margin:10px 0}figure img{max-width:100%;height:auto;border:1px solid #ddd}
figcaption{font-size:.92em;color:#333;max-width:1100px}
dl.glossary{display:grid;grid-template-columns:17em 1fr;gap:3px 14px}dl.glossary dt{font-weight:600}
dl.glossary dd{margin:0}
footer{margin-top:30px;font-size:.85em;color:#444}
@media print{.scroll{overflow:visible}a{color:inherit}}
"""


# ----------------------------------------------------------------------------------------------------------------
# names, escaping, atomic files


def safe_component(name: str) -> str:
    """A path-safe, stable file-name component for an athlete/session name.

    Names made only of ASCII letters, digits, ``_``, ``-`` and inner dots (no ``..``, no leading dot, at most 64
    characters, not a Windows device name) are kept as they are. Anything else becomes its cleaned letters plus the
    first 10 hex digits of the SHA-256 of the original, so two different names never share a file and the same name
    always gives the same file. The result never holds a path separator, ``..``, a control character or a leading dot.
    """
    text = str(name)
    stem = text.split(".")[0].lower()
    if (_SAFE_NAME.fullmatch(text) and ".." not in text and not text.endswith(".")
            and stem not in _WINDOWS_RESERVED):
        return text
    ascii_text = unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode("ascii")
    cleaned = re.sub(r"[^A-Za-z0-9_-]+", "_", ascii_text).strip("_-")[:40]
    digest = hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()[:10]
    return f"{cleaned or 'name'}-{digest}"


def _e(value: object) -> str:
    """HTML-escape any value (quotes included)."""
    return html.escape("" if value is None else str(value), quote=True)


def _mpl_text(value: object) -> str:
    """Text for a matplotlib label: dollar signs escaped so a name can never switch on mathtext."""
    return str(value).replace("\\", "\\\\").replace("$", r"\$")


def _csv_cell(value: object) -> object:
    """Neutralise spreadsheet formulas in text cells (a leading = + - @ tab or CR) with a leading apostrophe."""
    if isinstance(value, str) and value[:1] in ("=", "+", "-", "@", "\t", "\r"):
        return "'" + value
    return value


def _inside(root: Path, path: Path) -> Path:
    """Return ``path`` after checking it resolves inside ``root`` (defence in depth behind safe_component)."""
    resolved = path.resolve()
    if not resolved.is_relative_to(root.resolve()):
        raise ValueError(f"refusing to write outside the output folder: {path}")
    return path


def _write_atomic(path: Path, data: bytes | str) -> Path:
    """Write bytes or UTF-8 text through io's atomic writer (temporary file in the same folder, then rename)."""
    return atomic_write_bytes(path, data.encode("utf-8") if isinstance(data, str) else data)


# ----------------------------------------------------------------------------------------------------------------
# small table helpers


def session_sort_key(session: object) -> tuple:
    """Sort sessions by their YYYY-MM-DD prefix; names without a date go last, alphabetically."""
    text = str(session)
    match = _DATE_PREFIX.match(text)
    return (0, match.group(0), text) if match else (1, "", text)


def _sessions_in_order(values: Iterable[object]) -> list[str]:
    return sorted({str(v) for v in values}, key=session_sort_key)


def _muscles_in_order(values: Iterable[object]) -> list[str]:
    present = {str(v) for v in values}
    return [m for m in MUSCLE_ORDER if m in present] + sorted(present - set(MUSCLE_ORDER))


def _muscle_label(muscle: str) -> str:
    return MUSCLE_SHORT.get(muscle, muscle)


def _num(value: object) -> float:
    try:
        out = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return math.nan
    return out


def _fmt(value: object, digits: int = 1) -> str:
    x = _num(value)
    return "–" if not math.isfinite(x) else f"{x:.{digits}f}"


def _fmt_pm(mean: object, sd: object, digits: int = 1) -> str:
    m, s = _num(mean), _num(sd)
    if not math.isfinite(m):
        return "–"
    return f"{m:.{digits}f} ± {s:.{digits}f}" if math.isfinite(s) else f"{m:.{digits}f}"


def _column(df: pd.DataFrame, name: str) -> pd.Series:
    """A column as floats, or all-NaN when the table lacks it."""
    if name in df.columns:
        return pd.to_numeric(df[name], errors="coerce")
    return pd.Series(np.nan, index=df.index, dtype=float)


def _by_athlete(df: pd.DataFrame | None) -> dict[str, pd.DataFrame]:
    if df is None or len(df) == 0 or "athlete" not in df.columns:
        return {}
    return {str(k): g for k, g in df.groupby(df["athlete"].astype(str), sort=False)}


def _empty_like(df: pd.DataFrame | None) -> pd.DataFrame:
    return pd.DataFrame(columns=list(df.columns) if df is not None else [])


def _text(value: object) -> str:
    """Text of a table value; missing values (None, NaN) become an en dash."""
    return "–" if _missing(value) else str(value)


def _td(value: object, digits: int | None = None, *, text: str | None = None) -> str:
    """A table cell; numbers get a numeric sort key and right alignment."""
    if digits is not None:
        x = _num(value)
        key = f"{x:.6g}" if math.isfinite(x) else ""
        return f'<td class="num" data-sort="{key}">{_e(text if text is not None else _fmt(x, digits))}</td>'
    return f"<td>{_e(_text(value) if text is None else text)}</td>"


def _table(table_id: str, headers: Sequence[str], rows: Sequence[str], *, sortable: bool = True,
           caption: str | None = None, titles: Sequence[str] | None = None) -> str:
    cls = ' class="sortable"' if sortable else ""
    cap = f'<p class="explain">{_e(caption)}</p>' if caption else ""
    ths = "".join(
        f'<th scope="col"{f" title={chr(34)}{_e(titles[i])}{chr(34)}" if titles and titles[i] else ""}>{_e(h)}</th>'
        for i, h in enumerate(headers))
    body = "".join(rows) if rows else f'<tr><td colspan="{len(headers)}">none</td></tr>'
    return (f'{cap}<div class="scroll"><table id="{_e(table_id)}"{cls}><thead><tr>{ths}</tr></thead>'
            f"<tbody>{body}</tbody></table></div>")


def _page(title: str, body: str, *, home: str | None = None) -> str:
    nav = f'<p><a href="{_e(home)}">← squad overview</a></p>' if home else ""
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f"<meta http-equiv=\"Content-Security-Policy\" content=\"{_e(_CSP)}\">"
        "<meta name=\"referrer\" content=\"no-referrer\">"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>"
        f"{nav}{body}"
        f"<footer><div class=\"caution\" id=\"caution-footer\"><strong>Caution.</strong> {_e(CAUTION)}</div>"
        "<p>Made with hamstride. This page is self-contained: it loads nothing from the internet.</p></footer>"
        f"<script>{_PAGE_SCRIPT}</script></body></html>\n"
    )


def _caution_box() -> str:
    return f'<div class="caution" id="caution"><strong>Caution.</strong> {_e(CAUTION)}</div>'


def _glossary_html(terms: Sequence[str] | None = None) -> str:
    items = [(t, d) for t, d in GLOSSARY if terms is None or t in terms]
    return ('<dl class="glossary">' + "".join(f"<dt>{_e(t)}</dt><dd>{_e(d)}</dd>" for t, d in items) + "</dl>")


def _run_info_get(run_info: Mapping | None, *keys: str, default: object = None) -> object:
    for key in keys:
        if run_info and run_info.get(key) not in (None, ""):
            return run_info[key]
    return default


_DEFAULT_SLACK_NOTE = ("l/l_opt depends on the tendon slack length the model assumes; treat it as an estimate and "
                       "compare an athlete with themselves rather than with others.")


def _slack_note(run_info: Mapping | None) -> str:
    return str(_run_info_get(run_info, "tendon_slack_note", "tendon_note", "tendon_slack", "tendon_slack_assumption",
                             default=_DEFAULT_SLACK_NOTE))


def _thresholds(run_info: Mapping | None) -> Mapping:
    """Flag thresholds: ``run_info['thresholds']`` or the ``flags`` part of ``run_info['configuration']``."""
    found = _run_info_get(run_info, "thresholds", "config_thresholds")
    if isinstance(found, Mapping):
        return found
    config = _run_info_get(run_info, "configuration", "config")
    if isinstance(config, Mapping) and isinstance(config.get("flags"), Mapping):
        return config["flags"]
    return {}


def _filter_note(run_info: Mapping | None) -> str | None:
    found = _run_info_get(run_info, "filter_note", "filter_info", "filter_cutoff", "filter")
    if found:
        return _plain(found)
    config = _run_info_get(run_info, "configuration", "config")
    analysis = config.get("analysis") if isinstance(config, Mapping) else None
    if isinstance(analysis, Mapping) and "cutoff_hz" in analysis:
        cutoff = _num(analysis.get("cutoff_hz"))
        if math.isfinite(cutoff):
            return f"zero-lag Butterworth low-pass at a fixed {cutoff:g} Hz for every trial."
        return ("zero-lag Butterworth low-pass; the cutoff is chosen for each trial by Winter's residual analysis "
                "(the frequency above which the signal is mostly noise).")
    return None


_THRESHOLD_WORDS = MappingProxyType({
    "asymmetry_pct": "side_asymmetry when the left–right difference (|SI|) is above {v:g} %",
    "side_asymmetry_pct": "side_asymmetry when the left–right difference (|SI|) is above {v:g} %",
    "guarding_lsi_pct": "involved_side_guarding when the injured side stretches less than {v:g} % of the other side",
    "high_stretch_limit_lopt": "high_stretch when peak l/l_opt is above {v:g}",
    "high_stretch_squad_z": "high_stretch (without a fixed limit) when peak stretch is above the squad mean + {v:g} SD",
    "min_strides": "few_strides when a side has fewer than {v:g} strides",
    "speed_low_fraction": "speed_low when the session is slower than {p:g} % of the athlete's best",
    "asymmetry_confidence_z": "a side_asymmetry flag needs the difference to stay beyond the line after allowing "
                              "for stride-to-stride variation ({v:g} standard errors)",
    "high_stretch_min_athletes": "the squad comparison for high_stretch needs at least {v:g} athletes",
})


def _thresholds_text(thresholds: Mapping) -> str:
    parts = []
    for key, value in thresholds.items():
        number = _num(value)
        if key in _THRESHOLD_WORDS and math.isfinite(number):
            parts.append(_THRESHOLD_WORDS[key].format(v=number, p=100 * number))
        elif key == "muscles" and isinstance(value, (list, tuple)):
            parts.append("stretch flags look at " + ", ".join(_muscle_label(str(m)) for m in value))
        elif key not in _THRESHOLD_WORDS and value not in (None, ""):
            parts.append(f"{key} = {_plain(value)}")
    return "; ".join(parts)


def _notes_html(run_info: Mapping | None) -> str:
    """Model and processing notes from the run: version, tendon slack assumption, filter, thresholds."""
    version = _run_info_get(run_info, "software_version", "version", default="unknown")
    filt = _filter_note(run_info)
    uncertainty = _run_info_get(run_info, "uncertainty_note")
    thresholds = _thresholds_text(_thresholds(run_info))
    items = [f"<li><strong>Tendon slack assumption:</strong> {_e(_slack_note(run_info))}</li>"]
    if uncertainty:
        items.append(f"<li><strong>Model range:</strong> {_e(uncertainty)}</li>")
    if filt:
        items.append(f"<li><strong>Marker filtering:</strong> {_e(filt)}</li>")
    if thresholds:
        items.append(f"<li><strong>Flag thresholds:</strong> {_e(thresholds)}</li>")
    items.append(f"<li><strong>Software version:</strong> {_e(version)}</li>")
    return '<div class="note" id="notes"><ul>' + "".join(items) + "</ul></div>"


def _plain(value: object) -> str:
    if isinstance(value, Mapping):
        return "; ".join(f"{k} = {_plain(v)}" for k, v in value.items())
    if isinstance(value, (list, tuple)):
        return ", ".join(_plain(v) for v in value)
    return str(value)


# ----------------------------------------------------------------------------------------------------------------
# figures (matplotlib imported lazily so the CLI starts fast)


def _new_figure(width_in: float, height_in: float):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), dpi=100)
    return fig


def _margins(fig, *, top_in: float, left_in: float, bottom_in: float, right_in: float = 0.15,
             wspace: float = 0.08, hspace: float = 0.12) -> None:
    """Fixed margins in inches (much faster than tight_layout, which draws the figure once more)."""
    width, height = fig.get_size_inches()
    fig.subplots_adjust(left=left_in / width, right=1 - right_in / width, bottom=bottom_in / height,
                        top=1 - top_in / height, wspace=wspace, hspace=hspace)


def _header(fig, title: str, handles: list) -> None:
    """Title on the first line, legend on the second, both above the plots (never overlapping)."""
    width, height = fig.get_size_inches()
    fig.text(0.1 / width, 1 - 0.08 / height, _mpl_text(title), fontsize=10.5, va="top", ha="left")
    fig.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.1 / width, 1 - 0.33 / height),
               ncol=len(handles), fontsize=7.5, frameon=False, borderaxespad=0.0, handlelength=2.6)


_GRID_COLOUR = "#e5e5e5"
_CYCLE_TICKS = (0, 25, 50, 75, 100)


def _cycle_axes(ax) -> None:
    """Gait-cycle x axis 0..100 % with few ticks (tick objects dominate drawing time), light grid."""
    from matplotlib.ticker import FixedLocator, MaxNLocator

    ax.set_xlim(0, 100)
    ax.xaxis.set_major_locator(FixedLocator(_CYCLE_TICKS))
    ax.yaxis.set_major_locator(MaxNLocator(nbins=5))
    ax.tick_params(labelsize=7.5)
    ax.grid(True, color=_GRID_COLOUR, lw=0.5)


def _headroom(ax, fraction: float = 0.16) -> None:
    """Extra space above the data for the window labels (call once per shared row, after drawing)."""
    lo, hi = ax.get_ylim()
    ax.set_ylim(lo, hi + fraction * (hi - lo))


def _label_window(ax, starts: Mapping[str, float], toe_off: float) -> None:
    """Name the shaded late-swing window and the toe-off line (top row of a figure)."""
    from matplotlib.transforms import blended_transform_factory

    trans = blended_transform_factory(ax.transData, ax.transAxes)
    finite = [v for v in starts.values() if math.isfinite(v)]
    if finite:
        ax.text(0.5 * (float(np.mean(finite)) + 100.0), 0.97, "late\nswing", transform=trans, ha="center",
                va="top", fontsize=7, color="#333333")
    if math.isfinite(toe_off):
        ax.text(toe_off + 1.0, 0.97, "toe-off", transform=trans, ha="left", va="top", fontsize=7, color="#333333")


RASTER_DPI = 120  # one raster serves the HTML page (shown at 100 px per inch) and the PDF page (~125 ppi on A4)


class _Raster:
    """A figure drawn once: PNG bytes for HTML, RGB pixels for the PDF, and its size in inches."""

    __slots__ = ("png", "rgb", "size_in")

    def __init__(self, png: bytes, rgb: np.ndarray, size_in: tuple[float, float]):
        self.png, self.rgb, self.size_in = png, rgb, size_in


def _raster(fig, dpi: int = RASTER_DPI) -> _Raster:
    """Draw ``fig`` once with Agg; drawing once and reusing the pixels keeps a page well under a second."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image

    canvas = FigureCanvasAgg(fig)
    fig.set_dpi(dpi)
    canvas.draw()
    rgb = np.asarray(canvas.buffer_rgba())[..., :3].copy()
    buffer = io.BytesIO()
    Image.fromarray(rgb).save(buffer, format="PNG", compress_level=1)
    width, height = fig.get_size_inches()
    return _Raster(buffer.getvalue(), rgb, (float(width), float(height)))


def _img_tag(raster: _Raster, alt: str, img_id: str) -> str:
    data = base64.b64encode(raster.png).decode("ascii")
    width, height = (round(v * 100) for v in raster.size_in)
    return (f'<img id="{_e(img_id)}" alt="{_e(alt)}" width="{width}" height="{height}" '
            f'src="data:image/png;base64,{data}">')


def _side_handles(with_band: bool = True, with_peak: bool = True, with_window: bool = True) -> list:
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles = [Line2D([], [], color=PALETTE[s], ls=LINESTYLE[s], marker=MARKER[s], label=f"{s} (mean)")
               for s in SIDES]
    if with_band:
        handles.append(Patch(facecolor="#888888", alpha=PALETTE["band_alpha"], label="± SD across strides"))
    if with_window:
        handles.append(Patch(facecolor=PALETTE["late_swing"], edgecolor="#999999", label="late swing"))
    if with_peak:
        handles.append(Line2D([], [], color="black", marker="*", ls="none", markersize=9,
                              label="mean of stride peaks, bar = model range 5–95 %"))
    return handles


def _curve_stats(curves: pd.DataFrame, columns: Sequence[str]) -> dict[tuple[str, str, str], tuple]:
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


def _stride_groups(strides: pd.DataFrame) -> dict[tuple[str, str], pd.DataFrame]:
    if len(strides) == 0 or not {"side", "muscle"} <= set(strides.columns):
        return {}
    return {(str(k[0]), str(k[1])): g for k, g in strides.groupby([strides["side"].astype(str),
                                                                   strides["muscle"].astype(str)], sort=False)}


def _window_starts(strides: pd.DataFrame) -> dict[str, float]:
    starts = {}
    for side in SIDES:
        sel = strides[strides["side"].astype(str) == side] if "side" in strides.columns else strides.iloc[:0]
        starts[side] = float(np.nanmean(_column(sel, "late_swing_start_pct"))) if len(sel) else math.nan
        if not math.isfinite(starts[side]):
            starts[side] = math.nan
    return starts


def _toe_off(strides: pd.DataFrame) -> float:
    vals = _column(strides, "toe_off_pct").to_numpy(dtype=float)
    return float(np.nanmean(vals)) if np.isfinite(vals).any() else math.nan


def _shade_window(ax, starts: Mapping[str, float], toe_off: float) -> None:
    finite = [v for v in starts.values() if math.isfinite(v)]
    if finite:
        ax.axvspan(float(np.mean(finite)), 100.0, color=PALETTE["late_swing"], zorder=0, lw=0)
    if math.isfinite(toe_off):
        ax.axvline(toe_off, color=PALETTE["reference"], ls=":", lw=0.9, zorder=1)


def _plot_side_curves(ax, stats: Mapping, muscle: str, column: str) -> dict[str, tuple]:
    """Mean ± SD per side; returns per side the (pct, mean) arrays drawn."""
    drawn = {}
    for side in SIDES:
        if (side, muscle, column) not in stats:
            continue
        pct, mv, sv = stats[(side, muscle, column)]
        if not np.isfinite(mv).any():
            continue
        sv = np.nan_to_num(sv)
        colour = PALETTE[side]
        ax.fill_between(pct, mv - sv, mv + sv, color=colour, alpha=PALETTE["band_alpha"], lw=0, zorder=2)
        ax.plot(pct, mv, color=colour, ls=LINESTYLE[side], lw=1.6, marker=MARKER[side], markersize=3.5,
                markevery=max(1, len(pct) // 10), zorder=3)
        drawn[side] = (pct, mv)
    return drawn


def _nanmean_of(df: pd.DataFrame | None, column: str | None) -> float:
    if df is None or column is None or len(df) == 0:
        return math.nan
    v = _column(df, column).to_numpy(dtype=float)
    return float(np.nanmean(v)) if np.isfinite(v).any() else math.nan


def _mark_peaks(ax, drawn: Mapping[str, tuple], groups: Mapping, muscle: str, value_col: str | None,
                low_col: str | None, high_col: str | None, time_col: str | None) -> None:
    """Star at the mean of the stride peaks (at their mean time), with the model range as a vertical bar."""
    for side, (pct, mv) in drawn.items():
        sel = groups.get((side, muscle))
        peak_time = _nanmean_of(sel, time_col)
        if not math.isfinite(peak_time):
            peak_time = float(pct[int(np.nanargmax(mv))])
        peak_value = _nanmean_of(sel, value_col)
        if not math.isfinite(peak_value):
            peak_value = float(np.nanmax(mv))
        lo, hi = _nanmean_of(sel, low_col), _nanmean_of(sel, high_col)
        if math.isfinite(lo) and math.isfinite(hi):
            ax.vlines(peak_time, lo, hi, color=PALETTE[side], lw=2.2, zorder=4)
        ax.plot([peak_time], [peak_value], marker="*", markersize=10, color=PALETTE[side],
                markeredgecolor="black", markeredgewidth=0.6, ls="none", zorder=5)


_STRETCH_ROWS = (
    ("strain_pct", "stretch vs upright (%)", "peak_strain_pct", "peak_strain_p5_pct", "peak_strain_p95_pct",
     "peak_strain_time_pct"),
    # rigid tendon: fibre length rises with musculotendon length, so its late-swing peak comes with the strain peak
    ("fibre_length_lopt", "fibre length l/l_opt (–)", "peak_fibre_length_lopt", "peak_fibre_length_lopt_p5",
     "peak_fibre_length_lopt_p95", "peak_strain_time_pct"),
    ("velocity_lopt_per_s", "lengthening velocity (l_opt/s)", None, None, None, None),
)
_FORCE_ROWS = (("force_n", "muscle force (N)"), ("power_w", "muscle power (W)"))


def _muscle_grid(fig, rows: Sequence[tuple[str, str]], muscles: Sequence[str], curves: pd.DataFrame,
                 strides: pd.DataFrame, decorate) -> np.ndarray:
    """One column per muscle and one row per curve column, left and right overlaid, late swing shaded.

    ``decorate(ax, column, muscle, drawn)`` adds what is particular to a row (reference lines, peak marks)."""
    stats = _curve_stats(curves, [r[0] for r in rows])
    starts, toe_off = _window_starts(strides), _toe_off(strides)
    axes = fig.subplots(len(rows), max(1, len(muscles)), squeeze=False)
    for j, muscle in enumerate(muscles):
        for i, (col, ylabel) in enumerate(rows):
            ax = axes[i, j]
            _shade_window(ax, starts, toe_off)
            drawn = _plot_side_curves(ax, stats, muscle, col)
            decorate(ax, col, muscle, drawn)
            if not drawn:
                ax.text(0.5, 0.5, "no data", transform=ax.transAxes, ha="center", va="center", color="#777777")
            if i == 0:
                ax.set_title(_mpl_text(MUSCLE_NAMES.get(muscle, muscle)), fontsize=9)
                _label_window(ax, starts, toe_off)
            if j == 0:
                ax.set_ylabel(ylabel, fontsize=8.5)
            if i == len(rows) - 1:
                ax.set_xlabel("gait cycle (%)", fontsize=8.5)
    _share_rows(axes)
    return axes


def _share_rows(axes: np.ndarray) -> None:
    """One y range per row and one x range for all (as shared axes), headroom on the top row for the window labels;
    tick labels only on the left column and the bottom row. Inner panels get plain grid lines instead of ticks:
    tick objects dominate drawing time, and inner tick labels would be hidden anyway."""
    from matplotlib.ticker import NullLocator

    n_rows, n_cols = axes.shape
    for i in range(n_rows):
        limits = np.array([axes[i, j].get_ylim() for j in range(n_cols)])
        lo, hi = float(limits[:, 0].min()), float(limits[:, 1].max())
        if i == 0:
            hi += 0.16 * (hi - lo)  # _headroom
        for j in range(n_cols):
            ax = axes[i, j]
            ax.set_ylim(lo, hi)
            _cycle_axes(ax)
            if j:
                ax.yaxis.set_major_locator(NullLocator())
            if i < n_rows - 1:
                ax.xaxis.set_major_locator(NullLocator())
        y_grid = [v for v in axes[i, 0].yaxis.get_major_locator().tick_values(lo, hi) if lo <= v <= hi]
        for j in range(n_cols):
            ax = axes[i, j]
            if j:
                for v in y_grid:
                    ax.axhline(v, color=_GRID_COLOUR, lw=0.5, zorder=1.5)  # where ax.grid draws
            if i < n_rows - 1:
                for v in _CYCLE_TICKS:
                    ax.axvline(v, color=_GRID_COLOUR, lw=0.5, zorder=1.5)  # where ax.grid draws


def _stretch_figure(curves: pd.DataFrame, strides: pd.DataFrame, muscles: Sequence[str], title: str):
    groups = _stride_groups(strides)
    peaks = {r[0]: r[2:] for r in _STRETCH_ROWS}

    def decorate(ax, col, muscle, drawn):
        if col == "fibre_length_lopt":
            ax.axhline(1.0, color=PALETTE["reference"], ls=":", lw=1.0, zorder=1)
            ax.text(1.5, 1.0, "optimal length", fontsize=7, color=PALETTE["reference"], va="bottom")
        if col == "velocity_lopt_per_s":
            ax.axhline(0.0, color=PALETTE["reference"], ls="-", lw=0.6, zorder=1)
        if drawn:
            _mark_peaks(ax, drawn, groups, muscle, *peaks[col])

    fig = _new_figure(2.9 * max(1, len(muscles)) + 0.6, 7.6)
    _muscle_grid(fig, [r[:2] for r in _STRETCH_ROWS], muscles, curves, strides, decorate)
    _header(fig, title, _side_handles())
    _margins(fig, top_in=0.85, left_in=0.75, bottom_in=0.5)
    return fig


def _force_figure(curves: pd.DataFrame, strides: pd.DataFrame, muscles: Sequence[str], title: str):
    from matplotlib.lines import Line2D

    groups = _stride_groups(strides)

    def decorate(ax, col, muscle, drawn):
        if col == "force_n" and drawn:
            _mark_peaks(ax, drawn, groups, muscle, "peak_force_n", None, None, None)
        if col == "power_w":
            ax.axhline(0.0, color=PALETTE["reference"], ls="-", lw=0.6, zorder=1)

    fig = _new_figure(2.9 * max(1, len(muscles)) + 0.6, 5.2)
    _muscle_grid(fig, _FORCE_ROWS, muscles, curves, strides, decorate)
    star = Line2D([], [], color="black", marker="*", ls="none", markersize=9, label="mean of stride peak forces")
    _header(fig, title, _side_handles(with_peak=False) + [star])
    _margins(fig, top_in=0.85, left_in=0.75, bottom_in=0.5)
    return fig


def _joint_figure(curves: pd.DataFrame, strides: pd.DataFrame, title: str):
    """Hip and knee flexion (one muscle's rows suffice: the joint angles are shared by all muscles)."""
    cols = [c for c in ("hip_flexion_deg", "knee_flexion_deg") if c in curves.columns]
    first = _muscles_in_order(curves["muscle"])[:1]
    one = curves[curves["muscle"].astype(str).isin(first)]
    stats = _curve_stats(one, cols)
    starts, toe_off = _window_starts(strides), _toe_off(strides)
    fig = _new_figure(9.0, 2.9)
    axes = fig.subplots(1, 2, squeeze=False)[0]
    labels = {"hip_flexion_deg": "hip flexion (deg)", "knee_flexion_deg": "knee flexion (deg)"}
    for ax, col in zip(axes, ("hip_flexion_deg", "knee_flexion_deg")):
        _shade_window(ax, starts, toe_off)
        drawn = _plot_side_curves(ax, stats, first[0] if first else "", col)
        if not drawn:
            ax.text(0.5, 0.5, "no data", transform=ax.transAxes, ha="center", va="center", color="#777777")
        ax.axhline(0.0, color=PALETTE["reference"], lw=0.6)
        _label_window(ax, starts, toe_off)
        _headroom(ax)
        ax.set_ylabel(labels[col], fontsize=8.5)
        ax.set_xlabel("gait cycle (%)", fontsize=8.5)
        _cycle_axes(ax)
    _header(fig, title, _side_handles(with_peak=False))
    _margins(fig, top_in=0.85, left_in=0.75, bottom_in=0.5, wspace=0.25)
    return fig


# ----------------------------------------------------------------------------------------------------------------
# athlete page


def _athlete_info(athletes: pd.DataFrame | None, athlete: str) -> dict:
    if athletes is None or len(athletes) == 0 or "athlete" not in athletes.columns:
        return {}
    rows = athletes[athletes["athlete"].astype(str) == athlete]
    return {} if rows.empty else rows.iloc[0].to_dict()


def _missing(value: object) -> bool:
    if value is None:
        return True
    if isinstance(value, float) and math.isnan(value):
        return True
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def _info_line(info: Mapping) -> str:
    parts = []
    mass = _num(info.get("body_mass_kg"))
    parts.append(f"body mass {_fmt(mass, 1)} kg" if math.isfinite(mass) else "body mass not given")
    height = _num(info.get("height_m"))
    if math.isfinite(height):
        parts.append(f"height {height:.2f} m")
    for key, label in (("sex", "sex"), ("involved_side", "previously injured side"), ("injury_date", "injury date")):
        value = info.get(key)
        if not _missing(value) and str(value).strip():
            parts.append(f"{label} {value}")
    return " · ".join(parts)


def _flag_rows(flags: pd.DataFrame, *, with_athlete: bool, links: Mapping[str, str] | None = None) -> list[str]:
    rows = []
    if flags is None or len(flags) == 0:
        return rows
    ordered = flags.assign(_key=flags["session"].map(session_sort_key) if "session" in flags.columns else 0)
    ordered = ordered.sort_values("_key", kind="stable")
    for rec in ordered.to_dict("records"):
        cells = []
        if with_athlete:
            name = str(rec.get("athlete", ""))
            href = links.get(name) if links else None
            cells.append(f'<td><a href="{_e(href)}">{_e(name)}</a></td>' if href else _td(name))
        flag = str(rec.get("flag", ""))
        explanation = FLAG_EXPLANATIONS.get(flag, "")
        muscle = rec.get("muscle")
        cells += [_td(rec.get("session")), _td(rec.get("side")),
                  _td(None if _missing(muscle) else _muscle_label(str(muscle))),
                  f'<td title="{_e(explanation)}">{_e(flag)}</td>',
                  _td(rec.get("value"), 2), _td(rec.get("threshold"), 2),
                  f'<td class="msg">{_e(rec.get("message", ""))}</td>']
        rows.append('<tr class="flagged">' + "".join(cells) + "</tr>")
    return rows


_FLAG_HEADERS = ("session", "side", "muscle", "flag", "value", "threshold", "message")


def _flags_explained() -> str:
    return "<ul class=\"explain\">" + "".join(
        f"<li><strong>{_e(k)}</strong>: {_e(v)}</li>" for k, v in FLAG_EXPLANATIONS.items()) + "</ul>"


def _summary_value(rows: pd.DataFrame, side: str, column: str) -> float:
    sel = rows[rows["side"].astype(str) == side]
    if sel.empty or column not in sel.columns:
        return math.nan
    return _num(sel.iloc[0][column])


def _first_finite(rows: pd.DataFrame, column: str) -> float:
    vals = _column(rows, column).to_numpy(dtype=float)
    finite = vals[np.isfinite(vals)]
    return float(finite[0]) if finite.size else math.nan


def _symmetry_index(left: float, right: float) -> float:
    """SI = (R - L) / (0.5 (R + L)) x 100 (Robinson et al. 1987, from memory)."""
    denom = 0.5 * (left + right)
    return (right - left) / denom * 100.0 if math.isfinite(denom) and denom != 0 else math.nan


def _summary_table(summary: pd.DataFrame, sessions: Sequence[str], muscles: Sequence[str],
                   with_work: bool = True) -> tuple[str, list]:
    """Two sortable tables (stretch; work and force) per session and muscle, and plain rows for the PDF."""
    headers = ["session", "muscle", "strides L/R", "speed (m/s)",
               "peak stretch L (%)", "peak stretch R (%)", "stretch CV L/R (%)", "stretch SI (%)", "stretch LSI (%)",
               "peak l/l_opt L", "peak l/l_opt R",
               "peak lengthening velocity L (l_opt/s)", "peak lengthening velocity R (l_opt/s)"]
    work_headers = ["session", "muscle", "negative work L (J)", "negative work R (J)", "negative work SI (%)",
                    "negative work LSI (%)", "peak force L (N)", "peak force R (N)"]
    rows_html, rows_text, work_rows = [], [], []
    by_key: dict[tuple[str, str], dict[str, dict]] = {}
    for rec in summary.to_dict("records"):
        by_key.setdefault((str(rec.get("session")), str(rec.get("muscle"))), {})[str(rec.get("side"))] = rec

    def first_finite(recs: Mapping[str, dict], column: str) -> float:
        for side in (*SIDES, *recs.keys()):
            value = _num(recs.get(side, {}).get(column))
            if math.isfinite(value):
                return value
        return math.nan

    for session in sessions:
        for muscle in muscles:
            recs = by_key.get((session, muscle))
            if not recs:
                continue
            val = {side: {col: _num(recs.get(side, {}).get(col)) for col in (
                "n_strides", "speed_m_s", "peak_strain_pct_mean", "peak_strain_pct_sd", "peak_strain_pct_cv_pct",
                "peak_fibre_length_lopt_mean", "peak_fibre_length_lopt_sd",
                "peak_lengthening_velocity_lopt_per_s_mean", "peak_lengthening_velocity_lopt_per_s_sd",
                "negative_work_j_mean", "negative_work_j_sd", "peak_force_n_mean", "peak_force_n_sd")}
                for side in SIDES}
            si = first_finite(recs, "peak_strain_symmetry_index_pct")
            if not math.isfinite(si):
                si = _symmetry_index(val["left"]["peak_strain_pct_mean"], val["right"]["peak_strain_pct_mean"])
            wsi = first_finite(recs, "negative_work_symmetry_index_pct")
            if not math.isfinite(wsi):
                wsi = _symmetry_index(val["left"]["negative_work_j_mean"], val["right"]["negative_work_j_mean"])
            lsi = first_finite(recs, "peak_strain_lsi_pct")
            wlsi = first_finite(recs, "negative_work_lsi_pct")
            speed = np.nanmean([val[s]["speed_m_s"] for s in SIDES]) if any(
                math.isfinite(val[s]["speed_m_s"]) for s in SIDES) else math.nan
            L, R = val["left"], val["right"]
            strides_txt = f"{_fmt(L['n_strides'], 0)}/{_fmt(R['n_strides'], 0)}"
            cv_txt = f"{_fmt(L['peak_strain_pct_cv_pct'], 0)}/{_fmt(R['peak_strain_pct_cv_pct'], 0)}"
            cells = [
                _td(session), _td(_muscle_label(muscle)), _td(L["n_strides"], 0, text=strides_txt),
                _td(speed, 2),
                _td(L["peak_strain_pct_mean"], 1, text=_fmt_pm(L["peak_strain_pct_mean"], L["peak_strain_pct_sd"])),
                _td(R["peak_strain_pct_mean"], 1, text=_fmt_pm(R["peak_strain_pct_mean"], R["peak_strain_pct_sd"])),
                _td(L["peak_strain_pct_cv_pct"], 0, text=cv_txt), _td(si, 1), _td(lsi, 0),
                _td(L["peak_fibre_length_lopt_mean"], 2,
                    text=_fmt_pm(L["peak_fibre_length_lopt_mean"], L["peak_fibre_length_lopt_sd"], 2)),
                _td(R["peak_fibre_length_lopt_mean"], 2,
                    text=_fmt_pm(R["peak_fibre_length_lopt_mean"], R["peak_fibre_length_lopt_sd"], 2)),
                _td(L["peak_lengthening_velocity_lopt_per_s_mean"], 1,
                    text=_fmt_pm(L["peak_lengthening_velocity_lopt_per_s_mean"],
                                 L["peak_lengthening_velocity_lopt_per_s_sd"])),
                _td(R["peak_lengthening_velocity_lopt_per_s_mean"], 1,
                    text=_fmt_pm(R["peak_lengthening_velocity_lopt_per_s_mean"],
                                 R["peak_lengthening_velocity_lopt_per_s_sd"])),
            ]
            work_cells = [
                _td(session), _td(_muscle_label(muscle)),
                _td(L["negative_work_j_mean"], 1, text=_fmt_pm(L["negative_work_j_mean"], L["negative_work_j_sd"])),
                _td(R["negative_work_j_mean"], 1, text=_fmt_pm(R["negative_work_j_mean"], R["negative_work_j_sd"])),
                _td(wsi, 1), _td(wlsi, 0),
                _td(L["peak_force_n_mean"], 0, text=_fmt_pm(L["peak_force_n_mean"], L["peak_force_n_sd"], 0)),
                _td(R["peak_force_n_mean"], 0, text=_fmt_pm(R["peak_force_n_mean"], R["peak_force_n_sd"], 0)),
            ]
            rows_html.append("<tr>" + "".join(cells) + "</tr>")
            work_rows.append("<tr>" + "".join(work_cells) + "</tr>")
            rows_text.append((session, _muscle_label(muscle), strides_txt,
                              _fmt_pm(L["peak_strain_pct_mean"], L["peak_strain_pct_sd"]),
                              _fmt_pm(R["peak_strain_pct_mean"], R["peak_strain_pct_sd"]), _fmt(si, 1), _fmt(lsi, 0),
                              _fmt(L["peak_fibre_length_lopt_mean"], 2), _fmt(R["peak_fibre_length_lopt_mean"], 2),
                              _fmt(L["negative_work_j_mean"], 1), _fmt(R["negative_work_j_mean"], 1)))
    titles = [None, None, "strides used left / right", None, "mean ± SD over strides", "mean ± SD over strides",
              "stride-to-stride variation", "(R − L) ÷ average × 100", "involved ÷ uninvolved × 100",
              None, None, None, None]
    table = _table("summary", headers, rows_html, titles=titles,
                   caption="Stretch per session and muscle, left (L) and right (R): mean ± SD over strides. "
                           "Click a column heading to sort.")
    if with_work:
        table += _table("summary-work", work_headers, work_rows,
                        caption="Negative work and peak force per session and muscle (mean ± SD over strides).")
    else:
        table += f'<p class="note">{_e(BODY_MASS_MISSING)}.</p>'
    return table, rows_text


def _uncertainty_table(strides: pd.DataFrame, muscles: Sequence[str]) -> tuple[str, list]:
    headers = ["muscle", "side", "peak stretch (%)", "model range 5–95 % (%)", "peak l/l_opt",
               "model range 5–95 % (l/l_opt)"]
    rows_html, rows_text = [], []
    for muscle in muscles:
        for side in SIDES:
            sel = strides[(strides["muscle"].astype(str) == muscle) & (strides["side"].astype(str) == side)]
            if sel.empty:
                continue

            def mean_of(col: str) -> float:
                v = _column(sel, col).to_numpy(dtype=float)
                return float(np.nanmean(v)) if np.isfinite(v).any() else math.nan

            s, s5, s95 = mean_of("peak_strain_pct"), mean_of("peak_strain_p5_pct"), mean_of("peak_strain_p95_pct")
            f, f5, f95 = (mean_of("peak_fibre_length_lopt"), mean_of("peak_fibre_length_lopt_p5"),
                          mean_of("peak_fibre_length_lopt_p95"))
            r1 = f"{_fmt(s5, 1)} to {_fmt(s95, 1)}"
            r2 = f"{_fmt(f5, 2)} to {_fmt(f95, 2)}"
            rows_html.append("<tr>" + _td(_muscle_label(muscle)) + _td(side) + _td(s, 1) + _td(s5, 1, text=r1)
                             + _td(f, 2) + _td(f5, 2, text=r2) + "</tr>")
            rows_text.append((_muscle_label(muscle), side, _fmt(s, 1), r1, _fmt(f, 2), r2))
    return _table("uncertainty", headers, rows_html,
                  caption="Model uncertainty band for the latest session (mean over strides)."), rows_text


def _stride_table(strides: pd.DataFrame, muscles: Sequence[str], has_work: bool) -> str:
    keys = ["session", "trial", "side", "stride"]
    data = strides.copy()
    for k in keys:
        if k not in data.columns:
            data[k] = ""
    data["_order"] = data["session"].map(session_sort_key)
    first = data.sort_values(["_order", "trial", "side", "stride"], kind="stable").groupby(
        keys, sort=False, dropna=False).first()
    per_muscle = {}
    values = ["peak_strain_pct"] + (["negative_work_j"] if has_work else [])
    for col in values:
        if col in data.columns:
            per_muscle[col] = data.pivot_table(index=keys, columns="muscle", values=col, aggfunc="first",
                                               dropna=False)
    base_cols = (("stride_time_s", "stride time (s)", 3), ("speed_m_s", "speed (m/s)", 2),
                 ("toe_off_pct", "toe-off (% cycle)", 0), ("late_swing_start_pct", "late swing starts (% cycle)", 0),
                 ("peak_hip_flexion_deg", "peak hip flexion (deg)", 0),
                 ("peak_knee_flexion_deg", "peak knee flexion (deg)", 0))
    headers = ["session", "trial", "side", "stride"] + [h for _, h, _ in base_cols]
    for col in values:
        label = "peak stretch (%)" if col == "peak_strain_pct" else "negative work (J)"
        headers += [f"{label} {_muscle_label(m)}" for m in muscles]
    # every looked-up value as one array per table (row by row .loc lookups were most of this table's time)
    base = {col: first[col].to_numpy() if col in first.columns else np.full(len(first), np.nan)
            for col, _, _ in base_cols}
    muscle_values = {col: (per_muscle[col].reindex(index=first.index, columns=list(muscles)).to_numpy(dtype=float)
                           if col in per_muscle else np.full((len(first), len(muscles)), np.nan)) for col in values}
    rows_html = []
    for row, idx in enumerate(first.index):
        cells = [_td(idx[0]), _td(idx[1]), _td(idx[2]), _td(idx[3], 0, text=str(idx[3]))]
        cells += [_td(base[col][row], digits) for col, _, digits in base_cols]
        for col in values:
            cells += [_td(v, 1) for v in muscle_values[col][row]]
        rows_html.append("<tr>" + "".join(cells) + "</tr>")
    return _table("strides", headers, rows_html, caption="Every stride used. Click a column heading to sort.")


def _has_values(df: pd.DataFrame, columns: Sequence[str]) -> bool:
    return any(np.isfinite(_column(df, c).to_numpy(dtype=float)).any() for c in columns)


def _athlete_page(athlete: str, strides: pd.DataFrame, curves: pd.DataFrame, flags: pd.DataFrame,
                  summary: pd.DataFrame, info: Mapping, run_info: Mapping | None, html_path: Path,
                  pdf_path: Path) -> None:
    sessions = _sessions_in_order(list(strides.get("session", [])) + list(summary.get("session", []))
                                  + list(curves.get("session", [])))
    latest = sessions[-1] if sessions else ""
    muscles = _muscles_in_order(list(curves.get("muscle", [])) + list(strides.get("muscle", []))
                                + list(summary.get("muscle", [])))
    cur_latest = curves[curves["session"].astype(str) == latest] if len(curves) else curves
    str_latest = strides[strides["session"].astype(str) == latest] if len(strides) else strides
    has_force = _has_values(strides, ("peak_force_n", "negative_work_j")) or _has_values(cur_latest, ("force_n",))
    mass_missing = not has_force

    figures = []  # (fig, title, explanation, id)
    if len(cur_latest):
        fig = _stretch_figure(cur_latest, str_latest, muscles, f"{athlete} · {latest} · muscle stretch over the "
                                                               f"gait cycle (left vs right)")
        figures.append((fig, "Stretch, fibre length and lengthening velocity",
                        "Each column is one hamstring muscle; lines are the average over strides (left solid with "
                        "circles, right dashed with triangles), bands show ± SD. Grey = late swing, dotted vertical "
                        "line = toe-off. Stars mark the average of each stride's peak (a little above the average "
                        "curve because strides peak at slightly different times); the bar through a star is the "
                        "model range (5–95 %). The dotted line at 1.0 in the middle row is the optimal fibre "
                        "length.", "fig-stretch"))
        if not mass_missing:
            fig = _force_figure(cur_latest, str_latest, muscles, f"{athlete} · {latest} · estimated muscle force "
                                                                 f"and power")
            figures.append((fig, "Force and power",
                            "Estimated force of each muscle (N) and its power (W). Power below zero means the muscle "
                            "absorbs energy while being stretched under load — that area is the negative work. "
                            "Stars mark the average peak force of the strides.", "fig-force"))
        fig = _joint_figure(cur_latest, str_latest, f"{athlete} · {latest} · hip and knee flexion")
        figures.append((fig, "Hip and knee angles",
                        "Hip flexion (thigh forward of the pelvis) and knee flexion in degrees, 0 = standing "
                        "upright; the hamstrings are longest when the hip is flexed and the knee straight, at the "
                        "end of swing.", "fig-joints"))

    pngs = [(_raster(fig), title, text, fid) for fig, title, text, fid in figures]

    flag_rows = _flag_rows(flags, with_athlete=False)
    summary_html, summary_text = _summary_table(summary, sessions, muscles, not mass_missing) if len(summary) else (
        "<p>No summary rows.</p>", [])
    uncertainty_html, uncertainty_text = _uncertainty_table(str_latest, muscles)
    stride_html = _stride_table(strides, muscles, not mass_missing)

    body = [f"<h1>Athlete {_e(athlete)}</h1>",
            f"<p>{_e(_info_line(info))}</p>",
            f"<p>Sessions: {_e(', '.join(sessions) or 'none')}. Plots show the latest session "
            f"(<strong>{_e(latest)}</strong>); the tables cover every session.</p>",
            _caution_box()]
    if mass_missing:
        body.append(f'<div class="note" id="body-mass-missing"><strong>{_e(BODY_MASS_MISSING)}.</strong></div>')
    body.append("<h2>Flags</h2>")
    body.append(f"<p class=\"explain\">{len(flag_rows)} flag(s). A flag is a prompt to look closer, not a finding."
                "</p>")
    body.append(_table("flags", _FLAG_HEADERS, flag_rows))
    body.append(_flags_explained())
    body.append("<h2>Summary per session</h2>")
    body.append(summary_html)
    for png, title, text, fid in pngs:
        body.append(f"<h2>{_e(title)}</h2><figure>{_img_tag(png, title, fid)}"
                    f"<figcaption>{_e(text)}</figcaption></figure>")
    body.append("<h2>Model uncertainty band</h2>")
    body.append("<p class=\"explain\">The model needs muscle dimensions we cannot measure in each athlete; the "
                "range shows how far the peaks could move when those dimensions vary within their published "
                "spread.</p>")
    body.append(uncertainty_html)
    body.append("<h2>Strides</h2>")
    if mass_missing:
        body.append(f"<p class=\"explain\">Negative work is not shown: {_e(BODY_MASS_MISSING)}.</p>")
    body.append(stride_html)
    body.append("<h2>Notes on the model</h2>")
    body.append(_notes_html(run_info))
    body.append("<h2>Terms used</h2>")
    body.append(_glossary_html())
    _write_atomic(html_path, _page(f"hamstride · {athlete}", "".join(body), home="../index.html"))

    _write_pdf(pdf_path, athlete, info, sessions, latest, flags, summary_text, uncertainty_text,
               [(r, title, text) for r, title, text, _ in pngs], run_info, mass_missing)


# ----------------------------------------------------------------------------------------------------------------
# PDF


def _text_page(pdf, lines: Sequence[tuple[str, str]], title: str) -> None:
    """One A4 page of text lines; each line is (style, text) with style 'h', 'b' (bold), 'm' (monospace) or ''.

    Consecutive lines of one style become one text object (far faster than one object per line).
    """
    fig = _new_figure(8.27, 11.69)
    fig.text(0.06, 0.965, _mpl_text(title), fontsize=13, weight="bold", va="top")
    y = 0.93
    blocks: list[tuple[str, list[str]]] = []
    for style, text in lines:
        if blocks and blocks[-1][0] == style and style != "h":
            blocks[-1][1].append(text)
        else:
            blocks.append((style, [text]))
    for style, texts in blocks:
        kwargs = {"fontsize": 8.5, "va": "top", "linespacing": 1.45}
        step = 0.0175
        if style == "h":
            y -= 0.008
            kwargs.update(fontsize=10.5, weight="bold")
        elif style == "b":
            kwargs.update(weight="bold")
        elif style == "m":
            kwargs.update(family="monospace", fontsize=7.2)
            step = 0.0145
        fig.text(0.06, y, _mpl_text("\n".join(texts)), **kwargs)
        y -= step * len(texts)
    pdf.savefig(fig)


def _image_page(pdf, raster: _Raster, title: str, caption: str = "") -> None:
    """An A4 landscape page holding one pre-drawn plot, its plain-language caption and the caution as a footer."""
    page = _new_figure(11.69, 8.27)
    ax = page.add_axes((0.03, 0.15, 0.94, 0.8))
    ax.imshow(raster.rgb, interpolation="none")
    ax.set_axis_off()
    ax.set_anchor("N")
    page.text(0.03, 0.975, _mpl_text(title), fontsize=9, va="top", color="#333333")
    if caption:
        page.text(0.03, 0.125, _mpl_text("\n".join(textwrap.wrap(caption, 175))), fontsize=8, va="top")
    page.text(0.03, 0.035, _mpl_text(f"Caution. {CAUTION}"), fontsize=7.5, va="top", color="#333333")
    pdf.savefig(page)


def _wrap(text: str, width: int = 110, style: str = "") -> list[tuple[str, str]]:
    return [(style, line) for line in textwrap.wrap(str(text), width=width) or [""]]


def _columns_text(headers: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    widths = [max(len(str(h)), *(len(str(r[i])) for r in rows)) if rows else len(str(h))
              for i, h in enumerate(headers)]
    def line(cells):
        return "  ".join(str(c).ljust(w) for c, w in zip(cells, widths))
    return [line(headers)] + [line(r) for r in rows]


def _paginate(lines: list[tuple[str, str]], per_page: int = 58) -> list[list[tuple[str, str]]]:
    return [lines[i:i + per_page] for i in range(0, len(lines), per_page)] or [[]]


def _write_pdf(path: Path, athlete: str, info: Mapping, sessions: Sequence[str], latest: str, flags: pd.DataFrame,
               summary_text: list, uncertainty_text: list, figures: list,
               run_info: Mapping | None, mass_missing: bool) -> None:
    from matplotlib.backends.backend_pdf import PdfPages

    lines: list[tuple[str, str]] = []
    lines += _wrap(_info_line(info))
    lines += _wrap(f"Sessions: {', '.join(sessions) or 'none'}. Plots: latest session {latest}.")
    lines.append(("h", "Caution"))
    lines += _wrap(CAUTION, style="b")
    if mass_missing:
        lines += _wrap(BODY_MASS_MISSING + ".", style="b")
    lines.append(("h", f"Flags ({0 if flags is None else len(flags)})"))
    if flags is None or len(flags) == 0:
        lines.append(("", "none"))
    else:
        for rec in flags.to_dict("records"):
            where = [_text(rec.get("session")), _text(rec.get("side")),
                     "–" if _missing(rec.get("muscle")) else _muscle_label(str(rec.get("muscle")))]
            head = (" · ".join(w for w in where if w != "–") + f" · {_text(rec.get('flag'))} (value "
                    f"{_fmt(rec.get('value'), 2)}, threshold {_fmt(rec.get('threshold'), 2)})")
            lines += _wrap(head, style="b")
            lines += _wrap(_text(rec.get("message")))
    lines.append(("h", "Summary (mean ± SD over strides; L = left, R = right)"))
    summary_headers = ("session", "muscle", "strides L/R", "stretch L %", "stretch R %", "SI %", "LSI %",
                       "l/l_opt L", "l/l_opt R", "neg. work L J", "neg. work R J")
    lines += [("m", t) for t in _columns_text(summary_headers, summary_text)]
    lines.append(("h", f"Model uncertainty band ({latest}, mean over strides)"))
    lines += [("m", t) for t in _columns_text(("muscle", "side", "stretch %", "range 5-95 %", "l/l_opt",
                                               "range 5-95 %"), uncertainty_text)]
    lines += _wrap("Every stride's values are in the HTML page of this athlete and in strides.csv.")
    lines.append(("h", "Notes"))
    lines += _wrap(f"Tendon slack assumption: {_slack_note(run_info)}")
    lines += _wrap(f"Software version: {_run_info_get(run_info, 'software_version', 'version', default='unknown')}")
    lines.append(("h", "Terms used"))
    for term, text in GLOSSARY:
        lines += _wrap(f"{term}: {text}")

    with atomic_path(path) as tmp:
        with PdfPages(tmp, metadata={"Title": f"hamstride report {athlete}", "Subject": CAUTION,
                                     "Creator": "hamstride"}) as pdf:
            for i, page in enumerate(_paginate(lines)):
                _text_page(pdf, page, f"hamstride · athlete {athlete}" + (" (continued)" if i else ""))
            for raster, title, caption in figures:
                _image_page(pdf, raster, f"{athlete} · {title}", caption)


# ----------------------------------------------------------------------------------------------------------------
# squad overview


def _latest_summary(summary: pd.DataFrame) -> pd.DataFrame:
    if summary is None or len(summary) == 0:
        return _empty_like(summary)
    keyed = summary.assign(_key=summary["session"].map(session_sort_key))
    latest_key = keyed.groupby(keyed["athlete"].astype(str))["_key"].transform("max")
    return keyed[keyed["_key"] == latest_key].drop(columns="_key")


def _asymmetry_points(latest: pd.DataFrame) -> pd.DataFrame:
    """One point per athlete and muscle: larger-side peak stretch and its symmetry index."""
    records = []
    for (athlete, muscle), rows in latest.groupby([latest["athlete"].astype(str), latest["muscle"].astype(str)],
                                                   sort=False):
        left = _summary_value(rows, "left", "peak_strain_pct_mean")
        right = _summary_value(rows, "right", "peak_strain_pct_mean")
        si = _first_finite(rows, "peak_strain_symmetry_index_pct")
        if not math.isfinite(si):
            si = _symmetry_index(left, right)
        peak = np.nanmax([left, right]) if (math.isfinite(left) or math.isfinite(right)) else math.nan
        records.append({"athlete": athlete, "muscle": muscle, "peak": peak, "si": si})
    return pd.DataFrame(records, columns=["athlete", "muscle", "peak", "si"])


def _short(name: str, limit: int = 14) -> str:
    return name if len(name) <= limit else name[: limit - 1] + "…"


def _squad_figure(points: pd.DataFrame, band_pct: float):
    """One point per athlete and muscle; each athlete is labelled once, at their largest asymmetry."""
    from matplotlib.patches import Patch

    width, height = 10.5, 5.6
    fig = _new_figure(width, height)
    ax = fig.add_axes((0.8 / width, 0.6 / height, (width - 3.9) / width, (height - 1.0) / height))
    ax.axhspan(-band_pct, band_pct, color=PALETTE["late_swing"], zorder=0, lw=0)
    ax.axhline(0.0, color=PALETTE["reference"], lw=0.8)
    finite = np.isfinite(points["peak"].to_numpy(dtype=float)) & np.isfinite(points["si"].to_numpy(dtype=float))
    ok = points[finite]
    for muscle in _muscles_in_order(ok["muscle"]):
        sel = ok[ok["muscle"] == muscle]
        ax.scatter(sel["peak"], sel["si"], s=46, marker=MUSCLE_MARKER.get(muscle, "o"),
                   color=PALETTE["muscles"].get(muscle, "#444444"), edgecolor="black", linewidth=0.5,
                   label=_mpl_text(MUSCLE_NAMES.get(muscle, muscle)), zorder=3)
    for athlete, rows in ok.groupby("athlete", sort=False):
        worst = rows.iloc[int(np.argmax(np.abs(rows["si"].to_numpy(dtype=float))))]
        ax.annotate(_mpl_text(_short(str(athlete))), (worst["peak"], worst["si"]), xytext=(5, 4),
                    textcoords="offset points", fontsize=7.5, zorder=4)
    if ok.empty:
        ax.text(0.5, 0.5, "no athlete with both sides measured", transform=ax.transAxes, ha="center", va="center")
        limit = 2 * band_pct
    else:
        limit = max(2 * band_pct, 1.15 * float(np.abs(ok["si"]).max()))
    ax.set_ylim(-limit, limit)
    ax.set_xlabel("peak stretch, larger side (% of upright length)", fontsize=9)
    ax.set_ylabel("left–right symmetry index of peak stretch (%)", fontsize=9)
    ax.set_title("Asymmetry vs peak stretch (latest session of each athlete)", fontsize=10.5, loc="left")
    ax.grid(True, color="#e5e5e5", lw=0.5)
    ax.tick_params(labelsize=8)
    handles, _ = ax.get_legend_handles_labels()
    handles.append(Patch(facecolor=PALETTE["late_swing"], label=f"left–right within ±{band_pct:g} %"))
    fig.legend(handles=handles, fontsize=8, loc="upper left", bbox_to_anchor=(1 - 3.0 / width, 1 - 0.4 / height),
               frameon=False, title="muscle", title_fontsize=8.5, alignment="left")
    fig.text(1 - 3.0 / width, 0.6 / height, "Above the zero line: the right side\nstretches more. Below: the left "
             "side.\nEach athlete is named once, beside\ntheir most asymmetric muscle.", fontsize=8,
             va="bottom", color="#333333")
    return fig


def _failed_trials_html(run_info: Mapping | None) -> str:
    failed = _run_info_get(run_info, "failed_trials", "failed", default=[]) or []
    rows = []
    for item in failed:
        if isinstance(item, Mapping):
            trial = item.get("trial", item.get("file", item.get("path", "")))
            reason = item.get("reason", item.get("message", ""))
        elif isinstance(item, (list, tuple)):
            trial, reason = (list(item) + ["", ""])[:2]
        else:
            trial, reason = item, ""
        rows.append("<tr>" + _td(trial) + f'<td class="msg">{_e(reason)}</td>' + "</tr>")
    return _table("failed", ("trial", "reason"), rows, caption="Trials that could not be analysed (they are left "
                                                                "out of every table and plot).")


def render_squad(out_dir: Path, strides: pd.DataFrame, curves, flags: pd.DataFrame,
                 summary: pd.DataFrame, athletes: pd.DataFrame, run_info: dict) -> list[Path]:
    """Write ``index.html`` plus ``athletes/<name>.html`` and ``.pdf`` per athlete; returns the written paths.

    ``curves`` is the curves table, or a function athlete -> that athlete's curves (loaded while the page renders,
    so a large squad never holds every curve in memory).

    Pages are self-contained (plots embedded as PNG data URIs) and every file is written atomically.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    curve_loader = curves if callable(curves) else None  # athlete -> DataFrame, loaded while that page renders
    tables = (("strides", strides), ("flags", flags), ("summary", summary))
    groups = {name: _by_athlete(df) for name, df in (tables if curve_loader else tables + (("curves", curves),))}
    names = sorted(set().union(*(g.keys() for g in groups.values())), key=str)
    files = _unique_files(names)
    written: list[Path] = []
    jobs = []
    for athlete in names:
        html_path = _inside(out_dir, out_dir / "athletes" / f"{files[athlete]}.html")
        pdf_path = _inside(out_dir, out_dir / "athletes" / f"{files[athlete]}.pdf")
        jobs.append((athlete,
                     groups["strides"].get(athlete, _empty_like(strides)),
                     functools.partial(curve_loader, athlete) if curve_loader
                     else groups["curves"].get(athlete, _empty_like(curves)),
                     groups["flags"].get(athlete, _empty_like(flags)),
                     groups["summary"].get(athlete, _empty_like(summary)),
                     _athlete_info(athletes, athlete), run_info, html_path, pdf_path))
        written += [html_path, pdf_path]
    workers = _report_workers(run_info, len(jobs))
    if workers > 1:
        from concurrent.futures import ProcessPoolExecutor

        with ProcessPoolExecutor(max_workers=workers) as pool:
            list(pool.map(_render_athlete, jobs))
    else:
        for job in jobs:
            _render_athlete(job)

    links = {a: f"athletes/{quote(files[a])}.html" for a in names}
    index = _inside(out_dir, out_dir / "index.html")
    _write_atomic(index, _index_html(names, links, groups, strides, flags, summary, athletes, run_info))
    written.insert(0, index)
    return written


def _report_workers(run_info: Mapping | None, n_athletes: int) -> int:
    """Processes for the athlete pages: ``run_info['report_jobs']`` (or ``'jobs'``), at most one per athlete."""
    requested = _num(_run_info_get(run_info, "report_jobs", "jobs", default=1))
    if not math.isfinite(requested) or requested < 1:
        return 1
    return int(max(1, min(requested, n_athletes, os.cpu_count() or 1)))


def _render_athlete(job: tuple) -> float:
    """Render one athlete's page and PDF (a top-level function so a process pool can run it); returns CPU s."""
    import gc

    start = time.process_time()
    was_enabled = gc.isenabled()
    gc.disable()  # the page builds many short-lived objects; collecting mid-render only costs time
    try:
        athlete, strides, curves, *rest = job
        _athlete_page(athlete, strides, curves() if callable(curves) else curves, *rest)
    finally:
        if was_enabled:
            gc.enable()
    return time.process_time() - start


def _unique_files(names: Sequence[str]) -> dict[str, str]:
    """safe_component per athlete, with a hash added where two names would collide on a case-insensitive disk."""
    files = {n: safe_component(n) for n in names}
    seen: dict[str, list[str]] = {}
    for n, f in files.items():
        seen.setdefault(f.casefold(), []).append(n)
    for group in seen.values():
        if len(group) > 1:
            for n in group:
                files[n] = f"{files[n]}-{hashlib.sha256(n.encode('utf-8', 'surrogatepass')).hexdigest()[:10]}"
    return files


def _index_html(names: Sequence[str], links: Mapping[str, str], groups: Mapping[str, dict], strides: pd.DataFrame,
                flags: pd.DataFrame, summary: pd.DataFrame, athletes: pd.DataFrame, run_info: Mapping | None) -> str:
    latest = _latest_summary(summary)
    latest_groups = _by_athlete(latest)
    thresholds = _thresholds(run_info)
    band = 10.0
    for key in ("side_asymmetry_pct", "asymmetry_pct", "side_asymmetry"):
        if math.isfinite(_num(thresholds.get(key))):
            band = _num(thresholds.get(key))
            break
    points = _asymmetry_points(latest) if len(latest) else pd.DataFrame(columns=["athlete", "muscle", "peak", "si"])
    flag_muscles = thresholds.get("muscles")
    muscle_note = ""
    if isinstance(flag_muscles, (list, tuple)) and flag_muscles and len(points):
        # the muscles the stretch flags look at (the biarticular hamstrings by default)
        points = points[points["muscle"].isin([str(m) for m in flag_muscles])]
        muscle_note = "; muscles shown: " + ", ".join(_muscle_label(str(m)) for m in flag_muscles) + \
                      " (those the stretch flags look at)"
    fig = _squad_figure(points, band)
    png = _raster(fig)

    rows = []
    for athlete in names:
        summ = groups["summary"].get(athlete, _empty_like(summary))
        lat = latest_groups.get(athlete, _empty_like(summary))
        fl = groups["flags"].get(athlete, _empty_like(flags))
        info = _athlete_info(athletes, athlete)
        sessions = _sessions_in_order(summ["session"]) if len(summ) else _sessions_in_order(
            groups["strides"].get(athlete, _empty_like(strides)).get("session", []))
        bflh = lat[lat["muscle"].astype(str) == "biceps_femoris_long"] if len(lat) else lat
        left = _summary_value(bflh, "left", "peak_strain_pct_mean") if len(bflh) else math.nan
        right = _summary_value(bflh, "right", "peak_strain_pct_mean") if len(bflh) else math.nan
        si = _first_finite(bflh, "peak_strain_symmetry_index_pct") if len(bflh) else math.nan
        if not math.isfinite(si):
            si = _symmetry_index(left, right)
        lsi = _first_finite(bflh, "peak_strain_lsi_pct") if len(bflh) else math.nan
        pts = points[points["athlete"] == athlete]
        worst_text, worst = "–", math.nan
        if len(pts) and np.isfinite(pts["si"].to_numpy(dtype=float)).any():
            i = int(np.nanargmax(np.abs(pts["si"].to_numpy(dtype=float))))
            worst = float(pts["si"].iloc[i])
            worst_text = f"{worst:+.1f} ({_muscle_label(str(pts['muscle'].iloc[i]))})"
        speed = np.nanmean(_column(lat, "speed_m_s")) if np.isfinite(_column(lat, "speed_m_s")).any() else math.nan
        n_strides = _column(lat[lat["muscle"].astype(str) == "biceps_femoris_long"] if len(lat) else lat, "n_strides")
        n_text = "/".join(_fmt(_summary_value(lat[lat["muscle"].astype(str) == "biceps_femoris_long"], s, "n_strides"), 0)
                          for s in SIDES) if len(lat) else "–"
        latest_session = sessions[-1] if sessions else None
        fl_latest = fl[fl["session"].astype(str) == latest_session] if len(fl) and "session" in fl.columns else fl
        flag_names = sorted({str(f) for f in fl_latest.get("flag", [])})
        flagged = ' class="flagged"' if len(fl_latest) else ""
        flag_text = f"{len(fl_latest)}" + (f": {', '.join(flag_names)}" if flag_names else "")
        if len(fl) > len(fl_latest):
            flag_text += f" (all sessions: {len(fl)})"
        rows.append(
            f"<tr{flagged}>" + f'<td><a href="{_e(links[athlete])}">{_e(athlete)}</a></td>'
            + _td(len(sessions), 0, text=str(len(sessions))) + _td(sessions[-1] if sessions else "–")
            + _td(info.get("involved_side", "") if not _missing(info.get("involved_side")) else "–")
            + _td(speed, 2) + _td(np.nansum(n_strides) if len(n_strides) else math.nan, 0, text=n_text)
            + _td(left, 1) + _td(right, 1) + _td(si, 1) + _td(lsi, 0)
            + _td(abs(worst) if math.isfinite(worst) else math.nan, 1, text=worst_text)
            + f'<td class="msg" data-sort="{len(fl_latest)}">{_e(flag_text)}</td>'
            + "</tr>")
    headers = ("athlete", "sessions", "latest session", "injured side", "speed (m/s)", "BFlh strides L/R",
               "BFlh peak stretch L (%)", "BFlh peak stretch R (%)", "BFlh stretch SI (%)", "BFlh stretch LSI (%)",
               "largest |SI| (%) (muscle)", "flags")
    titles = (None, None, None, None, None, None, "mean over strides, latest session",
              "mean over strides, latest session", "(R − L) ÷ average × 100", "involved ÷ uninvolved × 100",
              "largest left–right difference over the muscles in the plot below",
              "flags in the latest session: number and kinds")
    athletes_table = _table("athletes", headers, rows, titles=titles,
                            caption="Latest session of each athlete. BFlh (biceps femoris long head) is the "
                                    "hamstring most often strained in sprinting. Click a heading to sort.")
    flag_rows = _flag_rows(flags, with_athlete=True, links=links)
    version = _run_info_get(run_info, "software_version", "version", default="unknown")
    generated = _run_info_get(run_info, "generated", "created", default=time.strftime("%Y-%m-%d %H:%M UTC",
                                                                                       time.gmtime()))
    body = [
        "<h1>Squad overview: hamstring stretch in sprinting</h1>",
        f"<p>{len(names)} athlete(s) · generated {_e(generated)} · hamstride {_e(version)}</p>",
        _caution_box(),
        "<h2>Athletes</h2>", athletes_table,
        "<h2>Flags</h2>",
        f"<p class=\"explain\">{len(flag_rows)} flag(s) across the squad. A flag is a prompt to look closer, not "
        "a finding.</p>",
        _table("flags", ("athlete", *_FLAG_HEADERS), flag_rows),
        _flags_explained(),
        "<h2>Asymmetry vs peak stretch</h2>",
        f"<figure>{_img_tag(png, 'Squad plot of left-right asymmetry against peak stretch', 'fig-squad')}"
        f"<figcaption>Each point is one muscle of one athlete (latest session){_e(muscle_note)}. "
        f"Right = more stretch; far from the zero line = left and right differ. The grey band marks a left–right difference within ±{band:g} % "
        f"(a difference under 10 % is often suggested for return to sport). Each athlete is named once, beside "
        f"their most asymmetric muscle.</figcaption></figure>",
        "<h2>Trials not analysed</h2>", _failed_trials_html(run_info),
        "<h2>Notes on the model</h2>", _notes_html(run_info),
        "<h2>Terms used</h2>", _glossary_html(),
    ]
    return _page("hamstride · squad overview", "".join(body))


# ----------------------------------------------------------------------------------------------------------------
# timeline


_TIMELINE_ROWS = (
    ("peak_strain_pct_mean", "peak stretch (%)"),
    ("peak_fibre_length_lopt_mean", "peak l/l_opt (–)"),
    ("negative_work_j_mean", "negative work (J)"),
)


def _timeline_lsi(tl: pd.DataFrame, muscle: str, column: str, sessions: Sequence[str]) -> np.ndarray:
    sel = tl[tl["muscle"].astype(str) == muscle]
    out = np.full(len(sessions), np.nan)
    for i, s in enumerate(sessions):
        out[i] = _first_finite(sel[sel["session"].astype(str) == s], column)
    return out


_MIN_SPAN = MappingProxyType({"speed_m_s": 1.0, "peak_strain_pct_mean": 2.0, "peak_fibre_length_lopt_mean": 0.1,
                              "negative_work_j_mean": 5.0})


def _min_span(ax, values: np.ndarray, span: float) -> None:
    """Give an axis at least ``span`` of range around its data, so small changes are not magnified."""
    finite = np.asarray(values, dtype=float)
    finite = finite[np.isfinite(finite)]
    if not finite.size:
        return
    lo, hi = float(finite.min()), float(finite.max())
    pad = max(0.1 * (hi - lo), 0.0)
    if hi - lo + 2 * pad < span:
        mid = 0.5 * (lo + hi)
        ax.set_ylim(mid - span / 2, mid + span / 2)
    else:
        ax.set_ylim(lo - pad, hi + pad)


def _timeline_figure(tl: pd.DataFrame, athlete: str, sessions: Sequence[str], xlabels: Sequence[str],
                     muscles: Sequence[str], lsi_cols: Sequence[str], x_title: str):
    """Speed on top, then per muscle (columns) peak stretch, peak l/l_opt, negative work and LSI per session."""
    from matplotlib.gridspec import GridSpec
    from matplotlib.lines import Line2D

    n = max(1, len(muscles))
    nrows = 1 + len(_TIMELINE_ROWS) + 1
    width, height = 3.0 * n + 0.9, 1.75 * nrows + 1.5
    fig = _new_figure(width, height)
    grid = GridSpec(nrows, n, figure=fig, left=0.85 / width, right=1 - 0.15 / width, top=1 - 0.75 / height,
                    bottom=0.95 / height, hspace=0.45, wspace=0.12)
    x = np.arange(len(sessions))
    xlim = (-0.4, max(len(sessions) - 0.6, 0.4))
    by_session = {(str(k[0]), str(k[1]), str(k[2])): g for k, g in tl.groupby(
        [tl["session"].astype(str), tl["side"].astype(str), tl["muscle"].astype(str)], sort=False)}

    def values(side: str | None, muscle: str | None, column: str) -> np.ndarray:
        out = np.full(len(sessions), np.nan)
        for i, ses in enumerate(sessions):
            parts = [g for (s_, side_, m_), g in by_session.items()
                     if s_ == ses and (side is None or side_ == side) and (muscle is None or m_ == muscle)]
            vals = np.concatenate([_column(g, column).to_numpy(dtype=float) for g in parts]) if parts else []
            vals = np.asarray(vals, dtype=float)
            out[i] = float(np.nanmean(vals)) if np.isfinite(vals).any() else np.nan
        return out

    ax = fig.add_subplot(grid[0, :])
    speed = values(None, None, "speed_m_s")
    ax.plot(x, speed, color="#333333", marker="s")
    _min_span(ax, speed, _MIN_SPAN["speed_m_s"])
    ax.set_ylabel("speed (m/s)", fontsize=8.5)
    ax.set_title("running speed (mean of the session's strides)", fontsize=9, loc="left")
    ax.set_xticks(x, [_mpl_text(v) for v in xlabels], fontsize=7.5)
    ax.set_xlim(*xlim)
    ax.tick_params(axis="y", labelsize=7.5)
    ax.grid(True, color="#e5e5e5", lw=0.5)
    rows_axes: dict[int, list] = {}
    row_values: dict[int, list] = {}
    lsi_values: list[np.ndarray] = []
    for j, muscle in enumerate(muscles):
        for i, (col, label) in enumerate(_TIMELINE_ROWS, start=1):
            share = rows_axes.get(i, [None])[0]
            ax = fig.add_subplot(grid[i, j], sharey=share)
            rows_axes.setdefault(i, []).append(ax)
            vals = {side: values(side, muscle, col) for side in SIDES}
            row_values.setdefault(i, []).extend(vals.values())
            if any(np.isfinite(v).any() for v in vals.values()):
                for side in SIDES:
                    ax.plot(x, vals[side], color=PALETTE[side], ls=LINESTYLE[side], marker=MARKER[side])
            else:
                ax.text(0.5, 0.5, "body mass missing" if col.startswith("negative") else "no data",
                        transform=ax.transAxes, ha="center", va="center", fontsize=7.5, color="#777777")
            if col == "peak_fibre_length_lopt_mean":
                ax.axhline(1.0, color=PALETTE["reference"], ls=":", lw=1.0)
            if i == 1:
                ax.set_title(_mpl_text(MUSCLE_NAMES.get(muscle, muscle)), fontsize=9)
            if j == 0:
                ax.set_ylabel(label, fontsize=8.5)
            else:
                ax.tick_params(labelleft=False)
            ax.set_xticks(x, [""] * len(x))
            ax.set_xlim(*xlim)
            ax.tick_params(labelsize=7.5)
            ax.grid(True, color="#e5e5e5", lw=0.5)
        share = rows_axes.get(nrows - 1, [None])[0]
        ax = fig.add_subplot(grid[nrows - 1, j], sharey=share)
        rows_axes.setdefault(nrows - 1, []).append(ax)
        ax.axhline(90.0, color=PALETTE["flag"], ls="-.", lw=1.3, zorder=1)
        drew = False
        for (ls, mk, colour), col in zip((("-", "s", "#222222"), (":", "D", "#6a3d7c")), lsi_cols):
            v = _timeline_lsi(tl, muscle, col, sessions)
            if np.isfinite(v).any():
                ax.plot(x, v, color=colour, ls=ls, marker=mk, zorder=3)
                lsi_values.append(v)
                drew = True
        if not drew:
            ax.text(0.5, 0.5, "LSI needs the injured side\nin athletes.csv", transform=ax.transAxes,
                    ha="center", va="center", fontsize=7.5, color="#777777")
        if j == 0:
            ax.set_ylabel("LSI (%)", fontsize=8.5)
        else:
            ax.tick_params(labelleft=False)
        ax.set_xticks(x, [_mpl_text(v) for v in xlabels], fontsize=6.5, rotation=30, ha="right")
        ax.set_xlim(*xlim)
        ax.tick_params(axis="y", labelsize=7.5)
        ax.grid(True, color="#e5e5e5", lw=0.5)
    for i, axes in rows_axes.items():  # a minimum span per row, so noise is not blown up into a trend
        if i <= len(_TIMELINE_ROWS):
            _min_span(axes[0], np.concatenate(row_values.get(i, [np.array([np.nan])])),
                      _MIN_SPAN[_TIMELINE_ROWS[i - 1][0]])
        else:
            data = np.concatenate(lsi_values) if lsi_values else np.array([np.nan])
            finite = data[np.isfinite(data)]
            lo = min(80.0, float(finite.min()) - 5) if finite.size else 80.0
            hi = max(110.0, float(finite.max()) + 5) if finite.size else 110.0
            for ax in axes:
                ax.axhspan(90.0, hi, color=PALETTE["late_swing"], lw=0, zorder=0)
            axes[0].set_ylim(lo, hi)
    fig.text(0.5, 0.12 / height, _mpl_text(x_title), ha="center", va="bottom", fontsize=8.5)
    fig.text(0.85 / width, 1 - 0.12 / height, _mpl_text(f"{athlete} · sessions in date order"), fontsize=11,
             va="top")
    handles = _side_handles(with_band=False, with_peak=False, with_window=False)
    handles += [Line2D([], [], color="#222222", marker="s", label="LSI of peak stretch")]
    if len(lsi_cols) > 1:
        handles.append(Line2D([], [], color="#6a3d7c", ls=":", marker="D", label="LSI of negative work"))
    handles.append(Line2D([], [], color=PALETTE["flag"], ls="-.", label="LSI 90 %"))
    fig.legend(handles=handles, loc="upper right", bbox_to_anchor=(1 - 0.15 / width, 1 - 0.1 / height),
               ncol=len(handles), fontsize=7.5, frameon=False)
    return fig


def render_timeline(out_dir: Path, timeline: pd.DataFrame, athlete: str, athlete_info: dict | None,
                    run_info: Mapping | None) -> list[Path]:
    """Write ``timeline_<athlete>.png``, ``.html`` and ``.csv`` (sessions in date order); returns the paths.

    ``timeline`` has one row per session × side × muscle with ``session, date, days_since_injury, side, muscle,
    speed_m_s, peak_strain_pct_mean, peak_fibre_length_lopt_mean, negative_work_j_mean`` and an LSI column
    (``lsi_pct`` or ``peak_strain_lsi_pct``; ``negative_work_lsi_pct`` is drawn too when present).
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    athlete = str(athlete)
    stem = f"timeline_{safe_component(athlete)}"
    tl = timeline.copy()
    for col in ("session", "side", "muscle"):
        if col not in tl.columns:
            tl[col] = ""
    sessions = _sessions_in_order(tl["session"])
    muscles = _muscles_in_order(tl["muscle"])
    days = {s: _first_finite(tl[tl["session"].astype(str) == s], "days_since_injury") for s in sessions}
    dates = {}
    for s in sessions:
        d = tl.loc[tl["session"].astype(str) == s, "date"] if "date" in tl.columns else pd.Series(dtype=object)
        stamp = pd.to_datetime(d, errors="coerce").dropna()
        match = _DATE_PREFIX.match(s)
        dates[s] = str(stamp.iloc[0].date()) if len(stamp) else (match.group(0) if match else s)
    xlabels = [dates[s] + (f"\nday {days[s]:.0f}" if math.isfinite(days[s]) else "") for s in sessions]
    lsi_cols = [c for c in ("lsi_pct", "peak_strain_lsi_pct") if c in tl.columns][:1]
    if "negative_work_lsi_pct" in tl.columns:
        lsi_cols.append("negative_work_lsi_pct")
    x_title = "session date" + (" (day N = days since the injury date in athletes.csv)"
                                if any(math.isfinite(v) for v in days.values()) else "")
    fig = _timeline_figure(tl, athlete, sessions, xlabels, muscles, lsi_cols, x_title)
    png = _raster(fig)

    png_path = _write_atomic(_inside(out_dir, out_dir / f"{stem}.png"), png.png)
    muscle_rank = {m: i for i, m in enumerate(muscles)}
    ordered = tl.assign(_key=tl["session"].map(session_sort_key),
                        _m=tl["muscle"].astype(str).map(muscle_rank)).sort_values(
        ["_key", "_m", "side"], kind="stable").drop(columns=["_key", "_m"])
    csv_frame = ordered.copy()
    for col in csv_frame.columns:
        if csv_frame[col].dtype == object:
            csv_frame[col] = csv_frame[col].map(_csv_cell)
    csv_path = _write_atomic(_inside(out_dir, out_dir / f"{stem}.csv"), csv_frame.to_csv(index=False))

    info = dict(athlete_info or {})
    has_injury = any(math.isfinite(v) for v in days.values())
    rows = []
    for rec in ordered.to_dict("records"):
        s = str(rec.get("session", ""))
        lsi = [_num(rec.get(c)) for c in lsi_cols]
        rows.append("<tr>" + _td(s) + _td(dates.get(s, ""))
                    + (_td(days.get(s), 0) if has_injury else "")
                    + _td(_muscle_label(str(rec.get("muscle", "")))) + _td(rec.get("side", ""))
                    + _td(rec.get("speed_m_s"), 2) + _td(rec.get("peak_strain_pct_mean"), 1)
                    + _td(rec.get("peak_fibre_length_lopt_mean"), 2) + _td(rec.get("negative_work_j_mean"), 1)
                    + "".join(_td(v, 0) for v in lsi) + "</tr>")
    lsi_names = {"lsi_pct": "LSI (%)", "peak_strain_lsi_pct": "LSI stretch (%)",
                 "negative_work_lsi_pct": "LSI negative work (%)"}
    headers = ["session", "date"] + (["days since injury"] if has_injury else []) + [
        "muscle", "side", "speed (m/s)", "peak stretch (%)", "peak l/l_opt", "negative work (J)"] + [
        lsi_names[c] for c in lsi_cols]
    work_missing = not _has_values(tl, ("negative_work_j_mean",))
    body = [f"<h1>Timeline: athlete {_e(athlete)}</h1>",
            f"<p>{_e(_info_line(info))}</p>" if info else "",
            f"<p>{len(sessions)} session(s) in date order: {_e(', '.join(sessions))}.</p>",
            _caution_box()]
    if work_missing:
        body.append(f'<div class="note" id="body-mass-missing"><strong>{_e(BODY_MASS_MISSING)}.</strong></div>')
    body += [
        "<h2>Sessions over time</h2>",
        f"<figure>{_img_tag(png, 'Timeline of speed, stretch, fibre length, negative work and LSI', 'fig-timeline')}"
        "<figcaption>Top: running speed per session. Then, per muscle (columns): peak stretch, peak l/l_opt "
        "(dotted line = optimal length), negative work per stride, and the limb symmetry index (LSI = involved ÷ "
        "uninvolved side × 100; the dash-dot line marks 90 %, often suggested as the minimum before return to "
        "sport). Left solid with circles, right dashed with triangles. Values are means over the strides of each "
        "session." + (" Labels under the bottom row give days since the injury date in athletes.csv."
                      if has_injury else "") + "</figcaption></figure>",
        "<h2>Table</h2>",
        _table("timeline", headers, rows, caption="One row per session, muscle and side (means over strides). "
                                                  "Click a heading to sort."),
        "<h2>Notes on the model</h2>", _notes_html(run_info),
        "<h2>Terms used</h2>", _glossary_html(),
    ]
    html_path = _write_atomic(_inside(out_dir, out_dir / f"{stem}.html"),
                              _page(f"hamstride · timeline {athlete}", "".join(body)))
    return [png_path, html_path, csv_path]
