"""Plausibility checks between stages: does a trial that read fine look like a sprint we can analyse?

Each check either raises a HamstrideError subclass with its own short code and a message that names the trial and
says what to do, or returns :class:`~hamstride.errors.TrialWarning` items (code + message) that the pipeline records
and ``--strict`` turns into errors. The checks only look at the objects handed between stages (MarkerTrial,
Landmarks), so they import nothing from a later stage.

Codes raised here: too_short, rate_too_low, no_marker_data, bad_coordinates, duplicate_labels, long_gap,
sides_swapped, units_suspect, body_size, pelvis_width, not_sprint, few_strides. Warnings: frames_missing, empty_frames,
bad_coordinates, duplicate_labels.
"""
from __future__ import annotations

import math
from pathlib import Path
from typing import Iterable, Mapping

import numpy as np

from .errors import EventError, FileFormatError, LandmarkError, PlausibilityError, TrialWarning
from .c3d import UNIT_TO_METRES, MarkerTrial
from .numerics import finite_points, runs_1d
from .landmarks import REQUIRED_LANDMARKS, Landmarks, MarkerMap, plain_name

__all__ = ["MIN_RATE_HZ", "MIN_DURATION_S", "MAX_MISSING_FRACTION", "MAX_BAD_COORDINATE_FRACTION",
           "MIN_SPRINT_SPEED_M_S", "NOMINAL_LENGTHS_M", "PELVIS_WIDTH_RANGE_M", "BODY_SCALE_RANGE",
           "check_marker_trial", "check_landmark_gaps", "swapped_marker_map", "check_sides", "check_body_size",
           "check_speed", "check_stride_count", "strict_failure"]

# Sprint foot contacts last about 0.1 s [M, references.md]; below 100 Hz a contact spans fewer than 10 frames and
# foot strike / toe-off cannot be timed to the 10 ms the stride metrics need (common practice).
MIN_RATE_HZ = 100.0
# One sprint stride takes 0.40-0.46 s [M, references.md]: shorter than this cannot hold a stride (common practice).
MIN_DURATION_S = 0.3
# More than this fraction of a required landmark missing is not filled (same limit as the segments stage).
MAX_MISSING_FRACTION = 0.2
# More than this fraction of all points with NaN/inf/absurd coordinates: the data block itself is corrupt.
MAX_BAD_COORDINATE_FRACTION = 0.2
# Below this running speed a trial is not analysed. A return-to-run progression starts at jogging pace, about
# 3-5 m/s (issue 13), so every run from about 3 m/s passes, with a margin for a slow first jog; walking is refused
# by its missing flight phase (events: not_running), not by speed. The speed stays in the outputs and the
# speed_low flag (metrics) keeps comparisons fair (common practice).
MIN_SPRINT_SPEED_M_S = 2.5

# Adult sizes used to recognise unit mistakes (from memory; common practice): inter-ASIS distance about 0.25 m
# (range 0.15-0.40 m), lateral epicondyle to lateral malleolus about 0.42 m, heel to first metatarsal head about
# 0.17 m. A unit mistake shows as all three off by the same power of ten.
NOMINAL_LENGTHS_M = {"pelvis width": 0.25, "shank": 0.42, "foot": 0.17}
PELVIS_WIDTH_RANGE_M = (0.15, 0.40)
BODY_SCALE_RANGE = (0.55, 1.6)  # ratio of measured to nominal lengths: about a 1.0-2.9 m tall person


def _name(trial: MarkerTrial | Landmarks) -> str:
    name = getattr(trial, "name", None) or getattr(trial, "trial", None) or ""
    return str(name)


def _ranges(mask: np.ndarray, rate_hz: float, limit: int = 3) -> str:
    """'0.00-0.12 s, 1.40-1.52 s' for the runs of True in ``mask`` (first ``limit`` runs)."""
    starts, stops = runs_1d(mask).T
    parts = [f"{a / rate_hz:.2f}-{(b - 1) / rate_hz:.2f} s" for a, b in zip(starts[:limit], stops[:limit])]
    more = f" and {len(starts) - limit} more" if len(starts) > limit else ""
    return ", ".join(parts) + more


def _longest_run(mask: np.ndarray) -> tuple[int, int]:
    """(length, start index) of the longest run of True in ``mask``."""
    edges = runs_1d(mask)
    if edges.size == 0:
        return 0, 0
    lengths = edges[:, 1] - edges[:, 0]
    k = int(np.argmax(lengths))
    return int(lengths[k]), int(edges[k, 0])


# ----------------------------------------------------------------------------------------------- the marker trial

def check_marker_trial(trial: MarkerTrial, landmark_labels: Iterable[str] = (), *,
                       min_rate_hz: float = MIN_RATE_HZ) -> tuple[TrialWarning, ...]:
    """Checks of a sprint trial straight after reading: sampling rate, length, empty frames, corrupt coordinates and
    duplicate labels. ``landmark_labels`` are the C3D labels the marker map uses: a duplicate among them is an error
    (which copy is the landmark?), any other duplicate a warning."""
    name = _name(trial)
    rate = float(trial.rate_hz)
    if rate < min_rate_hz:
        raise PlausibilityError(
            f"sampled at {rate:g} Hz; sprint foot strikes and toe-offs need at least {min_rate_hz:g} Hz (a foot "
            f"contact lasts about 0.1 s). Capture sprints at 200 Hz or more; this trial cannot be analysed",
            trial=name, code="rate_too_low")
    duration = trial.n_frames / rate
    promised = int(trial.meta.get("frames_promised", 0) or 0) if isinstance(trial.meta, Mapping) else 0
    if promised > trial.n_frames and (trial.n_frames < 2 or duration < MIN_DURATION_S):
        raise FileFormatError(
            f"the file holds only {trial.n_frames} of the {promised} frames its header promises ({duration:.3f} s): "
            "it was cut short (full disk or interrupted copy?); re-export or copy it again",
            trial=Path(trial.path).name, code="truncated")  # the file name, as io's file errors give it
    if trial.n_frames < 2 or duration < MIN_DURATION_S:
        raise PlausibilityError(
            f"only {trial.n_frames} frame(s) ({duration:.3f} s); a sprint stride takes about 0.45 s, so at least "
            f"{MIN_DURATION_S:g} s is needed. Check the export range in the capture software", trial=name,
            code="too_short")
    warnings: list[TrialWarning] = []
    if promised > trial.n_frames:
        warnings.append(TrialWarning(
            "frames_missing", f"the file holds {trial.n_frames} of the {promised} frames its header promises (it was "
            f"probably cut short: full disk or interrupted copy?); the {trial.n_frames} frames were analysed"))
    visible = finite_points(trial.xyz)  # [frame, marker]
    empty = ~visible.any(axis=1)
    seen = np.flatnonzero(~empty)
    if seen.size:  # before the first and after the last marker the athlete is outside the capture volume: no gap
        empty[:seen[0]] = False
        empty[seen[-1] + 1:] = False
    bad = int(trial.meta.get("bad_coordinates", 0) or 0) if isinstance(trial.meta, Mapping) else 0
    n_points = max(trial.xyz.shape[0] * trial.xyz.shape[1], 1)
    if bad > MAX_BAD_COORDINATE_FRACTION * n_points:
        raise PlausibilityError(
            f"{bad} of {n_points} marker positions ({100 * bad / n_points:.0f}%) are infinite or absurdly far "
            "(beyond 10 km); the data block is corrupt. Re-export the trial from the capture software",
            trial=name, code="bad_coordinates")
    if not seen.size:
        raise PlausibilityError("every marker is missing in every frame; there is nothing to analyse. Check that "
                                "the trial was reconstructed (labelled) before export", trial=name,
                                code="no_marker_data")
    if bad:
        warnings.append(TrialWarning("bad_coordinates", f"{bad} marker position(s) had infinite or absurd "
                                     "coordinates and were treated as missing; check the export"))
    if empty.any():
        warnings.append(TrialWarning(
            "empty_frames", f"{int(empty.sum())} frame(s) with every marker missing ({_ranges(empty, rate)}); "
            "they are treated as gaps"))
    counts: dict[str, int] = {}
    for label in trial.labels:
        key = label.strip().lower()
        counts[key] = counts.get(key, 0) + 1
    duplicates = sorted(k for k, v in counts.items() if v > 1 and k)
    if duplicates:
        used = {str(label).strip().lower() for label in landmark_labels}
        clash = [d for d in duplicates if d in used or d.rpartition(":")[2] in used]  # also 'Ath07:r.heel' x2
        listing = ", ".join(f"'{d}' x{counts[d]}" for d in duplicates[:6])
        if clash:
            raise PlausibilityError(
                f"duplicate marker labels ({listing}); '{clash[0]}' is a landmark, so it is unclear which copy to "
                "use. Rename or delete the extra copy in the capture software and re-export", trial=name,
                code="duplicate_labels")
        warnings.append(TrialWarning("duplicate_labels", f"duplicate marker labels ({listing}); they are not "
                                     "landmarks, so they were ignored"))
    return tuple(warnings)


# ----------------------------------------------------------------------------------------------- landmarks

def check_landmark_gaps(lm: Landmarks, *, max_missing_fraction: float = MAX_MISSING_FRACTION,
                        skip: Iterable[str] = ()) -> None:
    """Raise LandmarkError 'long_gap' naming every required landmark that is missing in more than
    ``max_missing_fraction`` of the frames (gap filling cannot bridge that), with its longest gap."""
    skip = set(skip)
    rate = float(lm.rate_hz)
    problems = []
    for landmark in REQUIRED_LANDMARKS:
        if landmark in skip or landmark not in lm.points:
            continue
        missing = ~finite_points(np.asarray(lm.points[landmark], float))
        fraction = float(missing.mean()) if missing.size else 1.0
        if fraction > max_missing_fraction:
            length, start = _longest_run(missing)
            label = lm.labels_used.get(landmark, "?") if hasattr(lm, "labels_used") else "?"
            problems.append(f"{plain_name(landmark)} (label '{label}') is missing in {100 * fraction:.0f}% of "
                            f"frames, longest gap {length / rate:.2f} s from {start / rate:.2f} s")
    if problems:
        raise LandmarkError(
            "; ".join(problems) + f". At most {100 * max_missing_fraction:.0f}% of a required landmark may be "
            "missing. Fill the gaps in the capture software, check the label in markers.toml, or supply a static "
            "trial with a marker cluster so the landmark can be rebuilt", trial=lm.trial, code="long_gap")


def _median_y(lm: Landmarks, landmark: str) -> float:
    with np.errstate(all="ignore"):
        values = np.asarray(lm.points[landmark], float)[:, 1]
        return float(np.nanmedian(values)) if np.isfinite(values).any() else math.nan


def swapped_marker_map(marker_map: MarkerMap, pairs: Iterable[str] | None = None) -> dict[str, str]:
    """The [landmarks] entries that undo a left/right swap: each left_X takes right_X's label and vice versa
    (all landmarks, or only the sites in ``pairs``)."""
    out: dict[str, str] = {}
    for landmark, label in marker_map.landmarks.items():
        if not landmark.startswith(("left_", "right_")):
            continue
        side, site = landmark.split("_", 1)
        if pairs is not None and site not in pairs:
            continue
        other = f"{'right' if side == 'left' else 'left'}_{site}"
        if other in marker_map.landmarks:
            out[landmark] = marker_map.landmarks[other]
    return out


def check_sides(lm: Landmarks, marker_map: MarkerMap | None = None) -> None:
    """Raise PlausibilityError 'sides_swapped' when the right ASIS (or PSIS) is on the athlete's left of the
    direction of travel (internal lab frame: y to the left), with the markers.toml lines that fix it."""
    marker_map = marker_map or MarkerMap()
    flipped = []
    for site in ("asis", "psis"):
        left, right = f"left_{site}", f"right_{site}"
        if left in lm.points and right in lm.points:
            gap = _median_y(lm, left) - _median_y(lm, right)  # left minus right along y (left): positive normally
            if math.isfinite(gap) and gap < -0.02:
                flipped.append(site)
    if not flipped:
        return
    whole = len(flipped) == 2
    fix = swapped_marker_map(marker_map, None if whole else flipped)
    lines = " ".join(f'{k} = "{v}"' for k, v in sorted(fix.items()) if k.startswith("right_"))
    what = "every left/right label looks swapped" if whole else f"the left and right {flipped[0].upper()} look swapped"
    raise PlausibilityError(
        f"{what}: the right {flipped[0].upper()} is on the athlete's left of the direction of travel. If the labels "
        f"were put on the wrong side, swap them in a markers.toml [landmarks] section (e.g. {lines[:240]}"
        f"{' ...' if len(lines) > 240 else ''}; and the same for the left_ entries) and rerun with --markers",
        trial=lm.trial, code="sides_swapped")


def _median_distance(lm: Landmarks, a: str, b: str) -> float:
    if a not in lm.points or b not in lm.points:
        return math.nan
    with np.errstate(all="ignore"):
        d = np.linalg.norm(np.asarray(lm.points[a], float) - np.asarray(lm.points[b], float), axis=1)
        return float(np.nanmedian(d)) if np.isfinite(d).any() else math.nan


def check_body_size(lm: Landmarks, units_in_file: str = "mm") -> None:
    """Raise 'units_suspect' when pelvis, shank and foot lengths are all off by a power of ten (a unit mistake),
    'body_size' when they are off otherwise, and 'pelvis_width' when only the inter-ASIS distance is outside the
    human range."""
    lengths = {"pelvis width": _median_distance(lm, "left_asis", "right_asis")}
    for side in ("left", "right"):
        lengths[f"{side} shank"] = _median_distance(lm, f"{side}_lateral_epicondyle", f"{side}_lateral_malleolus")
        lengths[f"{side} foot"] = _median_distance(lm, f"{side}_heel", f"{side}_first_metatarsal")
    ratios = [v / NOMINAL_LENGTHS_M[k.split(" ", 1)[-1] if k != "pelvis width" else k]
              for k, v in lengths.items() if math.isfinite(v) and v > 0]
    if not ratios:
        return
    scale = float(np.median(ratios))
    shown = ", ".join(f"{k} {v * 1000:.4g} mm" for k, v in lengths.items() if math.isfinite(v))
    power = round(math.log10(scale))
    if power != 0:
        metres_per_unit = UNIT_TO_METRES.get(units_in_file, 1e-3) / 10.0 ** power
        implied = min(("mm", "cm", "m"), key=lambda u: abs(math.log10(UNIT_TO_METRES[u] / metres_per_unit)))
        raise PlausibilityError(
            f"body dimensions are about {10.0 ** abs(power):g} times {'too small' if power < 0 else 'too large'} "
            f"({shown}): the file says its coordinates are in '{units_in_file}' but they look like '{implied}'. "
            f"Set POINT:UNITS to '{implied}' when exporting (or re-export in mm)", trial=lm.trial,
            code="units_suspect")
    if not BODY_SCALE_RANGE[0] <= scale <= BODY_SCALE_RANGE[1]:
        raise PlausibilityError(
            f"body dimensions are {scale:.2f} times an adult's ({shown}); check the marker placement and the "
            "landmark labels in markers.toml", trial=lm.trial, code="body_size")
    width = lengths["pelvis width"]
    if math.isfinite(width) and not PELVIS_WIDTH_RANGE_M[0] <= width <= PELVIS_WIDTH_RANGE_M[1]:
        raise PlausibilityError(
            f"the distance between the ASIS markers is {width:.3f} m, outside the human range "
            f"{PELVIS_WIDTH_RANGE_M[0]:g}-{PELVIS_WIDTH_RANGE_M[1]:g} m; check that the ASIS labels in markers.toml "
            "point at the ASIS markers (not the PSIS or a thigh marker)", trial=lm.trial, code="pelvis_width")


# ----------------------------------------------------------------------------------------------- speed

def check_speed(speed_m_s: float, trial: str, *, min_speed_m_s: float = MIN_SPRINT_SPEED_M_S) -> None:
    """Raise EventError 'not_sprint' when the running speed is below the analysed range (default 2.5 m/s)."""
    if math.isfinite(speed_m_s) and speed_m_s < min_speed_m_s:
        raise EventError(
            f"running speed {speed_m_s:.1f} m/s is below {min_speed_m_s:g} m/s, slower than the jogging pace "
            "hamstride analyses. Check the trial was filed under the right name, or lower min_speed_m_s in the "
            "configuration (hamstride config)", trial=trial, code="not_sprint")


def check_stride_count(strides, min_strides: int, trial: str, window=None, dropped_s=()) -> None:
    """Raise EventError 'few_strides' when a leg has fewer whole strides (foot strike to foot strike, valid or not)
    than ``min_strides``, naming how many were visible and, for a capture volume, the window where every landmark
    is seen (``landmarks.VisibleWindow``) and the events at its edges that were not trusted."""
    counts = {side: sum(1 for s in strides if s.side == side) for side in ("left", "right")}
    if min(counts.values()) >= min_strides:
        return
    where = ""
    if window is not None and not window.whole:
        where = f" in the {window.describe()} where every landmark is seen (the capture volume)"
        if len(dropped_s):
            where += (f"; {len(dropped_s)} foot event(s) within a few frames of the window's edges were not trusted "
                      "(markers just appearing or vanishing)")
    raise EventError(
        f"too few strides: {counts['left']} left and {counts['right']} right whole stride(s) were visible{where}; at "
        f"least {min_strides} per leg needed. Widen the capture volume or move it so it holds two whole strides per "
        "leg, or record a longer trial", trial=trial, code="few_strides")


def strict_failure(warnings: Iterable[TrialWarning], trial: str) -> PlausibilityError | None:
    """The error ``--strict`` raises for a trial with warnings (None when there are none)."""
    warnings = list(warnings)
    if not warnings:
        return None
    first = warnings[0]
    codes = sorted({w.code for w in warnings})
    return PlausibilityError(f"{first.message} (--strict turns warnings into errors; {len(warnings)} warning(s): "
                             f"{', '.join(codes)})", trial=trial, code=first.code)
