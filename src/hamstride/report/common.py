"""Words, names and small table helpers shared by the report's figures, pages and PDF (no drawing here).

Every piece of text that comes from folder names, file names, metadata or tables reaches HTML only through the
auto-escaping templates, a plot only through :func:`mpl_text` (no mathtext), a PDF only through
:func:`hamstride.report.pdf.para_text`, and a path only through :func:`safe_component`.
"""
from __future__ import annotations

import hashlib
import math
import re
import unicodedata
from pathlib import Path
from types import MappingProxyType
from typing import Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from ..atomic import atomic_write_bytes
from ..muscles import MUSCLE_NAMES as _MODEL_NAMES
from ..squadinput import DATE_PREFIX  # session folders start YYYY-MM-DD: one pattern for discovery and reports
from ..style import MUSCLE_ORDER, MUSCLE_SHORT

__all__ = ["CAUTION", "GLOSSARY", "FLAG_EXPLANATIONS", "BODY_MASS_MISSING", "MUSCLE_NAMES", "safe_component",
           "athlete_files", "session_sort_key"]

CAUTION = (
    "hamstride is a screening and monitoring aid, not a diagnosis; decisions about an athlete's care belong to "
    "qualified clinicians and local practice."
)

#: display names, e.g. "biceps femoris long head (BFlh)": the model's names with the literature's abbreviations
MUSCLE_NAMES = MappingProxyType({m: f"{_MODEL_NAMES[m]} ({MUSCLE_SHORT[m]})" for m in MUSCLE_ORDER})

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

_SAFE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,63}")
_WINDOWS_RESERVED = {"con", "prn", "aux", "nul", *(f"com{i}" for i in range(1, 10)), *(f"lpt{i}" for i in range(1, 10))}


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


def mpl_text(value: object) -> str:
    """Text for a matplotlib label: dollar signs escaped so a name can never switch on mathtext."""
    return str(value).replace("\\", "\\\\").replace("$", r"\$")


def csv_cell(value: object) -> object:
    """Neutralise spreadsheet formulas in text cells (a leading = + - @ tab or CR) with a leading apostrophe."""
    if isinstance(value, str) and value[:1] in ("=", "+", "-", "@", "\t", "\r"):
        return "'" + value
    return value


def inside(root: Path, path: Path) -> Path:
    """Return ``path`` after checking it resolves inside ``root`` (defence in depth behind safe_component)."""
    resolved = path.resolve()
    if not resolved.is_relative_to(root.resolve()):
        raise ValueError(f"refusing to write outside the output folder: {path}")
    return path


def write_atomic(path: Path, data: bytes | str) -> Path:
    """Write bytes or UTF-8 text through io's atomic writer (temporary file in the same folder, then rename)."""
    return atomic_write_bytes(path, data.encode("utf-8") if isinstance(data, str) else data)


# ----------------------------------------------------------------------------------------------------------------
# small table helpers


def session_sort_key(session: object) -> tuple:
    """Sort sessions by their YYYY-MM-DD prefix; names without a date go last, alphabetically."""
    text = str(session)
    match = DATE_PREFIX.match(text)
    return (0, match.group(0), text) if match else (1, "", text)


def sessions_in_order(values: Iterable[object]) -> list[str]:
    return sorted({str(v) for v in values}, key=session_sort_key)


def muscles_in_order(values: Iterable[object]) -> list[str]:
    present = {str(v) for v in values}
    return [m for m in MUSCLE_ORDER if m in present] + sorted(present - set(MUSCLE_ORDER))


def muscle_label(muscle: str) -> str:
    return MUSCLE_SHORT.get(muscle, muscle)


def num(value: object) -> float:
    try:
        out = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return math.nan
    return out


def fmt(value: object, digits: int = 1) -> str:
    x = num(value)
    return "–" if not math.isfinite(x) else f"{x:.{digits}f}"


def fmt_pm(mean: object, sd: object, digits: int = 1) -> str:
    m, s = num(mean), num(sd)
    if not math.isfinite(m):
        return "–"
    return f"{m:.{digits}f} ± {s:.{digits}f}" if math.isfinite(s) else f"{m:.{digits}f}"


def column(df: pd.DataFrame, name: str) -> pd.Series:
    """A column as floats, or all-NaN when the table lacks it."""
    if name in df.columns:
        return pd.to_numeric(df[name], errors="coerce")
    return pd.Series(np.nan, index=df.index, dtype=float)


def by_athlete(df: pd.DataFrame | None) -> dict[str, pd.DataFrame]:
    if df is None or len(df) == 0 or "athlete" not in df.columns:
        return {}
    return {str(k): g for k, g in df.groupby(df["athlete"].astype(str), sort=False)}


def empty_like(df: pd.DataFrame | None) -> pd.DataFrame:
    return pd.DataFrame(columns=list(df.columns) if df is not None else [])


def cell_text(value: object) -> str:
    """Text of a table value; missing values (None, NaN) become an en dash."""
    return "–" if missing(value) else str(value)


def run_info_get(run_info: Mapping | None, *keys: str, default: object = None) -> object:
    for key in keys:
        if run_info and run_info.get(key) not in (None, ""):
            return run_info[key]
    return default


_DEFAULT_SLACK_NOTE = ("l/l_opt depends on the tendon slack length the model assumes; treat it as an estimate and "
                       "compare an athlete with themselves rather than with others.")


def slack_note(run_info: Mapping | None) -> str:
    return str(run_info_get(run_info, "tendon_slack_note", "tendon_note", "tendon_slack", "tendon_slack_assumption",
                             default=_DEFAULT_SLACK_NOTE))


def thresholds_of(run_info: Mapping | None) -> Mapping:
    """Flag thresholds: ``run_info['thresholds']`` or the ``flags`` part of ``run_info['configuration']``."""
    found = run_info_get(run_info, "thresholds", "config_thresholds")
    if isinstance(found, Mapping):
        return found
    config = run_info_get(run_info, "configuration", "config")
    if isinstance(config, Mapping) and isinstance(config.get("flags"), Mapping):
        return config["flags"]
    return {}


def filter_note(run_info: Mapping | None) -> str | None:
    found = run_info_get(run_info, "filter_note", "filter_info", "filter_cutoff", "filter")
    if found:
        return plain(found)
    config = run_info_get(run_info, "configuration", "config")
    analysis = config.get("analysis") if isinstance(config, Mapping) else None
    if isinstance(analysis, Mapping) and "cutoff_hz" in analysis:
        cutoff = num(analysis.get("cutoff_hz"))
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


def thresholds_text(thresholds: Mapping) -> str:
    parts = []
    for key, value in thresholds.items():
        number = num(value)
        if key in _THRESHOLD_WORDS and math.isfinite(number):
            parts.append(_THRESHOLD_WORDS[key].format(v=number, p=100 * number))
        elif key == "muscles" and isinstance(value, (list, tuple)):
            parts.append("stretch flags look at " + ", ".join(muscle_label(str(m)) for m in value))
        elif key not in _THRESHOLD_WORDS and value not in (None, ""):
            parts.append(f"{key} = {plain(value)}")
    return "; ".join(parts)


def plain(value: object) -> str:
    if isinstance(value, Mapping):
        return "; ".join(f"{k} = {plain(v)}" for k, v in value.items())
    if isinstance(value, (list, tuple)):
        return ", ".join(plain(v) for v in value)
    return str(value)


def athlete_info(athletes: pd.DataFrame | None, athlete: str) -> dict:
    if athletes is None or len(athletes) == 0 or "athlete" not in athletes.columns:
        return {}
    rows = athletes[athletes["athlete"].astype(str) == athlete]
    return {} if rows.empty else rows.iloc[0].to_dict()


def missing(value: object) -> bool:
    if value is None:
        return True
    if isinstance(value, float) and math.isnan(value):
        return True
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def info_line(info: Mapping) -> str:
    parts = []
    mass = num(info.get("body_mass_kg"))
    parts.append(f"body mass {fmt(mass, 1)} kg" if math.isfinite(mass) else "body mass not given")
    height = num(info.get("height_m"))
    if math.isfinite(height):
        parts.append(f"height {height:.2f} m")
    for key, label in (("sex", "sex"), ("involved_side", "previously injured side"), ("injury_date", "injury date")):
        value = info.get(key)
        if not missing(value) and str(value).strip():
            parts.append(f"{label} {value}")
    return " · ".join(parts)


def summary_value(rows: pd.DataFrame, side: str, name: str) -> float:
    sel = rows[rows["side"].astype(str) == side]
    if sel.empty or name not in sel.columns:
        return math.nan
    return num(sel.iloc[0][name])


def first_finite(rows: pd.DataFrame, name: str) -> float:
    vals = column(rows, name).to_numpy(dtype=float)
    finite = vals[np.isfinite(vals)]
    return float(finite[0]) if finite.size else math.nan


def has_values(df: pd.DataFrame, columns: Sequence[str]) -> bool:
    return any(np.isfinite(column(df, c).to_numpy(dtype=float)).any() for c in columns)


def athlete_files(names: Sequence[str]) -> dict[str, str]:
    """The file stem of each athlete's outputs (page, PDF, curves): safe_component per athlete, with a hash added where two names would collide on a case-insensitive disk."""
    files = {n: safe_component(n) for n in names}
    seen: dict[str, list[str]] = {}
    for n, f in files.items():
        seen.setdefault(f.casefold(), []).append(n)
    for group in seen.values():
        if len(group) > 1:
            for n in group:
                files[n] = f"{files[n]}-{hashlib.sha256(n.encode('utf-8', 'surrogatepass')).hexdigest()[:10]}"
    return files


def latest_summary(summary: pd.DataFrame) -> pd.DataFrame:
    if summary is None or len(summary) == 0:
        return empty_like(summary)
    keyed = summary.assign(_key=summary["session"].map(session_sort_key))
    latest_key = keyed.groupby(keyed["athlete"].astype(str))["_key"].transform("max")
    return keyed[keyed["_key"] == latest_key].drop(columns="_key")


def plural(n: int, word: str, many: str | None = None) -> str:
    """``1 session``, ``2 sessions`` (``many`` for irregular plurals)."""
    return f"{n} {word if n == 1 else (many or word + 's')}"


def notes_items(run_info: Mapping | None) -> list[tuple[str, str]]:
    """Model and processing notes from the run: tendon slack assumption, model range, filter, thresholds, version."""
    items = [("Tendon slack assumption", slack_note(run_info))]
    uncertainty = run_info_get(run_info, "uncertainty_note")
    if uncertainty:
        items.append(("Model range", str(uncertainty)))
    filt = filter_note(run_info)
    if filt:
        items.append(("Marker filtering", filt))
    thresholds = thresholds_text(thresholds_of(run_info))
    if thresholds:
        items.append(("Flag thresholds", thresholds))
    items.append(("Software version", str(run_info_get(run_info, "software_version", "version", default="unknown"))))
    return items


def asymmetry_band(run_info: Mapping | None) -> float:
    """The |SI| above which side_asymmetry is flagged (the target zone drawn in the plots), 10 % by default."""
    found = thresholds_of(run_info)
    for key in ("side_asymmetry_pct", "asymmetry_pct", "side_asymmetry"):
        if math.isfinite(num(found.get(key))):
            return num(found.get(key))
    return 10.0


def guarding_lsi(run_info: Mapping | None) -> float:
    """The LSI below which involved_side_guarding is flagged, 90 % by default."""
    value = num(thresholds_of(run_info).get("guarding_lsi_pct"))
    return value if math.isfinite(value) else 90.0
