"""Foot strikes and toe-offs from marker kinematics (no force plates), running speed, treadmill detection.

Foot strike, after Handsaker et al. 2016 (J Biomech, doi 10.1016/j.jbiomech.2016.10.013): the impact is the
peak upward vertical acceleration of the heel or first-metatarsal marker, whichever comes first, inside a
search window. After zero-lag low-pass filtering that peak sits at the centre of the landing deceleration,
which starts before the foot is on the floor, so it runs a few ms early. The strike instant is therefore
refined, near the impact, to the first instant the foot's lowest landmark either reaches its floor level
(within 5 mm) or has its descent arrested (vertical speed down to a quarter of its approach speed): the
definition of touchdown itself, not an offset.
Touchdown changepoint (when the pipeline hands over the unfiltered landmarks): the floor's force starts at
touchdown, so there the foot markers' vertical acceleration (or, with a pad whose force rises from zero, its rate)
changes abruptly while position and velocity stay continuous, at the same instant for every marker of the foot.
Near the rule's strike the unfiltered heights of all foot markers are fitted with one cubic each whose 2nd and 3rd
derivatives may jump at a common join point, found by least squares on a grid (segmented regression: Hudson 1966,
Lerman 1980), the malleoli included (the impact stops foot and shank together); the join point replaces the strike
when its 95 % likelihood-ratio interval is narrower than 8 ms and, after it, the floor holds the landing marker and
(significantly) the malleoli above the paths they were falling on; a foot stopped in the air by turning about its
ankle is not a touchdown. This removes the lag of floor arrival on a
compressed pad (a forefoot marker still ~9 mm above its stance floor level at touchdown) without a tolerance to
tune, and leaves the rule's strike where the markers are too noisy to place the join (3 mm noise).
Toe-off (Handsaker et al. 2016): the peak vertical jerk of the toe marker (first metatarsal without one), taken
among the instants when the foot is leaving the floor: the toe landmark rising and the heel already lifted (more
than the 25 mm that counts as a low foot; heel-off precedes toe-off in the push-off). With marker noise the
third derivative has peaks of the same size in mid-stance, where the foot is flat; this excludes them (3 mm noise,
9 m/s: toe-off p95 55.7 -> 9.2 ms; noise-free unchanged).
Fallback and consistency check, after Fellin et al. 2010 (J Sci Med Sport 13:646): foot strike when the
lowest foot landmark stops descending (vertical velocity sign change), toe-off at peak knee extension (or,
without knee angles, when the toe landmark leaves its floor level).

Search windows come from a vertical-only contact estimate that works the same overground and on a
treadmill: a foot is "low" when its lowest landmark is within 25 mm of the height that landmark has when
the foot is on the floor (a low percentile of its height over the trial, so marker heights above the sole
and the floor level cancel). Derivatives use a symmetric Savitzky-Golay kernel (zero phase).
Timing needs marker data filtered at about 15 Hz or above: heavier smoothing spreads the landing and
delays the strike (about +7 ms at 10 Hz on generated sprints). Detecting the events on less filtered landmarks
than the joint kinematics' does not pay (benchmarks/events_running.py --event-cutoffs, 8 seeds): at a fixed
30-60 Hz the 9 m/s foot strikes gain only 1-2 ms (+6.1 -> +4.4 ms at 60 Hz; the rest of the lag is the rule's,
not the filter's) while the jerk of the toe-off drowns in noise (3.5 m/s toe-off p95 9 -> 57-77 ms with 0.5 mm
noise, and with 3 mm noise foot strikes at 3.5 m/s reach p95 59-76 ms); Winter's residual analysis of the foot
markers' heights alone picks 19-24 Hz (kinematics: 17-22 Hz; 10-14 Hz with 3 mm noise) and changes the errors by
< 1 ms. So one cutoff serves both.
Measured limits (benchmarks/events_running.py, running-feet generator whose feet land and lift like runners' feet,
no toe marker, 8 seeds): foot strikes |error| median 1.8 / p95 6.7 ms at 3.5 m/s (heel landings) and 0.9 / 2.1 ms
at 9 m/s (forefoot landings); the rule alone, without the changepoint, 4.3 / 7.7 ms and 6.1 / 6.8 ms (+6 ms late:
the metatarsal marker is still ~9 mm above its stance floor level at touchdown); toe-offs without a toe marker
5.1 / 9.0 ms (-5 ms early) and 2.5 / 3.4 ms.
Timing the strike by the ONSET of the landing's deceleration transient instead of its peak (a force plate's analogue:
a plate times contact by the force's onset, not its peak) does not remove that lag (benchmarks/events_running.py
--onset-study, 8 seeds, |error| median and bias at 3.5 / 9 m/s): the zero-lag filter and the derivative spread the
transient symmetrically, so it starts to rise 12-17 ms before touchdown. Its exit from the swing baseline (3 SD,
Hodges & Bui 1996) comes 17 / 12 ms early, its 50 % instant (IEEE Std 181) 8 / 6 ms early, its steepest rise
(peak jerk) 7 / 5 ms early, each earlier still with 3 mm noise (lower cutoff); a symmetric blur keeps only the
transient's centroid, which lies after touchdown by the time the pad takes to stop the foot. A floor level taken
from each landing's own settled height (where the descent stops) instead of the trial's deepest stance helps the
heel landings (3.5 m/s 1.6 / 4.9 ms) but not the forefoot ones (9 m/s +6.8 ms). Hence the changepoint on the
unfiltered heights above, which needs no filter and no tolerance.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Iterable, Mapping

import numpy as np

from .errors import EventError, LandmarkError
from .numerics import SIDES, finite_points, runs_1d
from .signal import savgol_derivative

if TYPE_CHECKING:  # pragma: no cover - typing only
    from .landmarks import Landmarks

STRIKE_MARKERS = ("heel", "first_metatarsal")  # Handsaker et al. 2016: heel or first metatarsal
SHANK_MARKERS = ("lateral_malleolus", "medial_malleolus")  # stopped with the foot at touchdown (_touchdown_changepoint)
FOOT_MARKERS = ("heel", "first_metatarsal", "fifth_metatarsal", "toe_tip")
PELVIS_MARKERS = ("left_asis", "right_asis", "left_psis", "right_psis")

# Tuning constants (common practice unless stated).
FLOOR_PERCENTILE = 2.0          # a foot is flat on the floor ~20 % of a sprint; 2nd percentile = floor level
LOW_FOOT_THRESHOLD_M = 0.025    # foot "low" when its lowest landmark is < 25 mm above that landmark's floor level
MIN_CONTACT_S = 0.03            # shorter low runs are noise / foot skimming the floor
MERGE_GAP_S = 0.02              # low runs separated by less than this are one contact
DERIVATIVE_WINDOW_S = 0.028     # Savitzky-Golay window for acceleration / jerk (about 7 frames at 250 Hz)
STRIKE_SEARCH_S = (0.03, 0.06)  # search window around the start of the low run (before, after; see _strike_window)
STRIKE_REFINE_S = (0.01, 0.03)  # floor-arrival search around the acceleration peak (before, after)
DESCENT_ARREST_FRACTION = 0.25  # descent "arrested" at a quarter of the approach speed (design choice, no source)
FLOOR_TOLERANCE_M = 0.005       # "on the floor" within 5 mm of its floor level: 10x a 0.5 mm noise (design choice)
TOE_OFF_SEARCH_S = (0.07, 0.05)  # search window around the end of the low run (before, after)
RULE_DISAGREEMENT_S = 0.025     # primary vs fallback rule: Fellin et al. 2010 report 22-25 ms foot-strike error
EDGE_PEAK_FRACTION = 0.5        # a toe-off next to a trial end needs half the median jerk peak of the others
EDGE_CONTACT_FRACTION = 0.75    # ... and a contact at least 3/4 of the side's median contact time (design choice;
                                # contact times vary by a few per cent from step to step at a steady speed)
C3D_DISAGREEMENT_FRAMES = 2     # issue 3: flag C3D vs marker events more than 2 frames apart
GAP_GUARD_S = 0.02              # events this close to missing foot-marker data are not trusted (design choice)
MISSING_EVENT_S = 0.03          # a marker event this far from every C3D event means the file lacks one
TREADMILL_MAX_PELVIS_SPEED = 1.0  # m/s net forward pelvis speed below which it is a treadmill trial (common practice)
# touchdown changepoint on the unfiltered marker heights (_touchdown_changepoint; design choices unless stated)
TOUCHDOWN_FIT_S = (0.04, 0.024)     # fitted span before and after the rule's strike: 40 ms of late-swing fall, 24 ms
                                    # of landing (the pad stops the foot within 10-20 ms)
TOUCHDOWN_SEARCH_S = (0.016, 0.008)  # changepoint searched from 16 ms before to 8 ms after the rule's strike (the
                                     # floor-arrival rule runs late, not early, when the pad is compressed: module doc)
TOUCHDOWN_STEP_FRAMES = 0.1         # grid step of the search (Lerman 1980's grid search), frames
TOUCHDOWN_MAX_CI_S = 0.008          # use the changepoint only when its 95 % confidence interval is narrower than
                                    # this: more precise than the rule it replaces (rule's p95 |error| 7.7 ms)


@dataclass(frozen=True)
class GaitEvents:
    """Foot strikes and toe-offs per side (s from the first frame, sorted)."""

    foot_strikes_s: dict[str, np.ndarray]
    toe_offs_s: dict[str, np.ndarray]
    method: str  # 'markers' or 'c3d'
    disagreements: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    fallback_foot_strikes_s: dict[str, np.ndarray] = field(default_factory=dict)
    fallback_toe_offs_s: dict[str, np.ndarray] = field(default_factory=dict)
    # the marker rule's own events (kept when the file's events or force plates replace them) and where each foot
    # strike came from: 'markers', 'file' or 'plate' (plates.apply_plate_contacts), aligned with foot_strikes_s
    marker_foot_strikes_s: dict[str, np.ndarray] = field(default_factory=dict)
    marker_toe_offs_s: dict[str, np.ndarray] = field(default_factory=dict)
    foot_strike_sources: dict[str, tuple[str, ...]] = field(default_factory=dict)


# --------------------------------------------------------------------------------------------
# small numerical helpers (vectorised over frames)
# --------------------------------------------------------------------------------------------
def _fill_nan(x: np.ndarray) -> np.ndarray:
    """Linear interpolation over NaN gaps (ends held); the signal stage normally fills gaps already."""
    x = np.asarray(x, dtype=float)
    ok = np.isfinite(x)
    if ok.all():
        return x
    if ok.sum() < 2:
        raise LandmarkError("a foot landmark is missing in almost every frame; events need heel and first metatarsal")
    idx = np.arange(x.size)
    return np.interp(idx, idx[ok], x[ok])


def _derivative(x: np.ndarray, order: int, rate_hz: float) -> np.ndarray:
    """Zero-phase derivative along the last axis by a symmetric Savitzky-Golay kernel (Savitzky & Golay 1964)."""
    window = int(round(DERIVATIVE_WINDOW_S * rate_hz)) | 1
    window = max(window, 5 if order < 3 else 7)
    poly = 3 if order < 3 else 4
    poly = min(poly, window - 1)
    return savgol_derivative(x, window, poly, order, rate_hz)


def _parabolic_peak(y: np.ndarray, i: int) -> float:
    """Sub-frame position of a discrete peak at i by a parabola through three samples."""
    if i <= 0 or i >= y.size - 1:
        return float(i)
    a, b, c = y[i - 1], y[i], y[i + 1]
    denom = a - 2.0 * b + c
    if denom == 0 or not np.isfinite(denom):
        return float(i)
    return float(i + 0.5 * (a - c) / denom)


def _first_crossing_up(y: np.ndarray, level: float, start: int, stop: int) -> float | None:
    """First sub-frame index in [start, stop) where y rises through level (linear interpolation)."""
    seg = y[start:stop]
    above = seg >= level
    hits = np.flatnonzero(~above[:-1] & above[1:])
    if hits.size == 0:
        return None
    k = hits[0]
    y0, y1 = seg[k], seg[k + 1]
    return float(start + k + (level - y0) / (y1 - y0))


# --------------------------------------------------------------------------------------------
# landmark access
# --------------------------------------------------------------------------------------------
def _foot_heights(lm: "Landmarks", side: str) -> dict[str, np.ndarray]:
    """Vertical coordinate of each available foot landmark of one side, gaps filled."""
    points = lm.points
    missing = [m for m in STRIKE_MARKERS if f"{side}_{m}" not in points]
    if missing:
        raise LandmarkError(
            f"{side} foot: landmark(s) {', '.join(side + '_' + m for m in missing)} not found; foot strikes "
            "need the heel and first-metatarsal markers. Check the marker map.",
            trial=getattr(lm, "trial", None),
        )
    return {m: _fill_nan(np.asarray(points[f"{side}_{m}"], float)[:, 2])
            for m in FOOT_MARKERS if f"{side}_{m}" in points}


def _unfiltered_heights(unfiltered: "Landmarks | None", side: str, heights: Mapping[str, np.ndarray],
                        n_frames: int) -> np.ndarray | None:
    """[landmark, F] vertical coordinate before low-pass filtering (gaps left missing) of the same foot landmarks
    (in the order of ``heights``) followed by the SHANK_MARKERS, or None when they are not all given."""
    if unfiltered is None:
        return None
    points = unfiltered.points
    names = [f"{side}_{m}" for m in (*heights, *SHANK_MARKERS)]
    if any(name not in points or len(points[name]) != n_frames for name in names):
        return None
    return np.stack([np.asarray(points[name], float)[:, 2] for name in names])


def _missing_foot_frames(lm: "Landmarks", side: str) -> np.ndarray:
    """Frames where any of the side's foot landmarks is missing (NaN)."""
    names = [f"{side}_{m}" for m in FOOT_MARKERS if f"{side}_{m}" in lm.points]
    return np.any([~finite_points(np.asarray(lm.points[m], float)) for m in names], axis=0)


def _drop_events_in_gaps(events: "_SideEvents", missing: np.ndarray, rate_hz: float) -> tuple["_SideEvents", list]:
    """Remove events within GAP_GUARD_S of a frame with missing foot markers (interpolated data, not seen)."""
    if not missing.any():
        return events, []
    guard = int(np.ceil(GAP_GUARD_S * rate_hz))
    near_gap = np.convolve(missing.astype(float), np.ones(2 * guard + 1), mode="same") > 0
    frames = np.arange(missing.size)

    def bad(x):
        return np.interp(x, frames, near_gap.astype(float)) > 0 if x.size else np.zeros(0, bool)

    bad_fs, bad_to = bad(events.strikes), bad(events.toe_offs)
    dropped = sorted(np.concatenate([events.strikes[bad_fs], events.toe_offs[bad_to]]) / rate_hz)
    kept = _SideEvents(events.strikes[~bad_fs], events.toe_offs[~bad_to], events.strikes_fallback[~bad_fs],
                       events.toe_offs_fallback[~bad_to], events.n_fallback_used)
    return kept, dropped


def _toe_name(heights: Mapping[str, np.ndarray]) -> str:
    return "toe_tip" if "toe_tip" in heights else "first_metatarsal"


def _heights_above_floor(heights: Mapping[str, np.ndarray]) -> np.ndarray:
    """[landmark, F] height of each foot landmark above its own floor level (marker heights above the sole cancel)."""
    z = np.stack(list(heights.values()))
    return z - np.percentile(z, FLOOR_PERCENTILE, axis=-1, keepdims=True)


def _low_foot_mask(lowest: np.ndarray, rate_hz: float) -> np.ndarray:
    """Frames where the foot's lowest landmark is within LOW_FOOT_THRESHOLD_M of its floor level (contact runs)."""
    mask = lowest < LOW_FOOT_THRESHOLD_M
    # close short gaps, then drop short runs
    runs = runs_1d(~mask)
    short_gap = (runs[:, 1] - runs[:, 0]) < MERGE_GAP_S * rate_hz
    inner = (runs[:, 0] > 0) & (runs[:, 1] < mask.size)
    for s, e in runs[short_gap & inner]:
        mask[s:e] = True
    runs = runs_1d(mask)
    short = (runs[:, 1] - runs[:, 0]) < MIN_CONTACT_S * rate_hz
    cut_by_trial_end = (runs[:, 0] == 0) | (runs[:, 1] == mask.size)  # a contact cut short by the recording
    for s, e in runs[short & ~cut_by_trial_end]:
        mask[s:e] = False
    return mask


# --------------------------------------------------------------------------------------------
# detection per side
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _SideEvents:
    strikes: np.ndarray   # frames (fractional), primary rule
    toe_offs: np.ndarray
    strikes_fallback: np.ndarray
    toe_offs_fallback: np.ndarray
    n_fallback_used: int


def _strike_primary(acc: Mapping[str, np.ndarray], lo: int, hi: int) -> float | None:
    """Earliest significant upward-acceleration peak of heel or first metatarsal in [lo, hi)."""
    candidates = []
    peak_heights = []
    for name, a in acc.items():
        seg = a[lo:hi]
        if seg.size < 3:
            continue
        inner = (seg[1:-1] > seg[:-2]) & (seg[1:-1] >= seg[2:]) & (seg[1:-1] > 0)
        peaks = np.flatnonzero(inner) + 1
        if peaks.size == 0:
            continue
        best = peaks[np.argmax(seg[peaks])]
        candidates.append((lo + best, name, seg[best]))
        peak_heights.append(seg[best])
    if not candidates:
        return None
    largest = max(peak_heights)
    significant = [c for c in candidates if c[2] >= 0.5 * largest]
    frame, name, _ = min(significant)
    return _parabolic_peak(acc[name], frame)


def _window_peak(y: np.ndarray, lo: int, hi: int, allowed: np.ndarray | None = None) -> float | None:
    """Sub-frame position of the largest local maximum of y in [lo, hi), among frames where `allowed` is True."""
    seg = y[lo:hi]
    if seg.size < 3:
        return None
    inner = (seg[1:-1] > seg[:-2]) & (seg[1:-1] >= seg[2:])
    if allowed is not None:
        inner &= allowed[lo + 1:hi - 1]
    peaks = np.flatnonzero(inner) + 1
    if peaks.size == 0:
        return None
    best = peaks[np.argmax(seg[peaks])]
    return _parabolic_peak(y, lo + best)


def _floor_arrival(lowest: np.ndarray, lo: int, hi: int) -> float | None:
    """First sub-frame index in [lo, hi) where the lowest landmark comes within FLOOR_TOLERANCE_M of its floor."""
    seg = lowest[lo:hi] - FLOOR_TOLERANCE_M
    below = seg <= 0
    if seg.size < 2 or not below.any():
        return None
    k = int(np.argmax(below))
    if k == 0:
        return float(lo)
    y0, y1 = seg[k - 1], seg[k]
    return float(lo + k - 1 + y0 / (y0 - y1))


def _descent_arrest(vz: np.ndarray, rel: np.ndarray, impact: int, lo: int, hi: int, lookback: int) -> float | None:
    """First sub-frame index in [lo, hi) where the landmark lowest at the impact has slowed its descent to
    DESCENT_ARREST_FRACTION of its peak descent speed over the preceding `lookback` frames."""
    k = int(np.argmin(rel[:, min(impact, rel.shape[1] - 1)]))
    v = vz[k]
    approach = v[max(impact - lookback, 0):impact + 1]
    if approach.size == 0 or approach.min() >= 0:
        return None
    i_fast = max(impact - lookback, 0) + int(np.argmin(approach))
    level = DESCENT_ARREST_FRACTION * approach.min()
    return _first_crossing_up(v, level, max(lo, i_fast), hi)


def _touchdown_changepoint(z: np.ndarray, guess: float, rate_hz: float, landing: int,
                           shank: Iterable[int]) -> float | None:
    """Touchdown as the join point of a segmented cubic fitted to the foot markers' unfiltered heights.

    Where the floor's force starts, the foot's vertical acceleration (or its rate) steps while its position and
    velocity stay continuous; every marker of the (rigid) foot and the shank's malleoli, which the impact stops with
    the foot (Clark et al. 2017's two-mass model), see the step at the same instant. So the heights [marker, F] are
    fitted, over TOUCHDOWN_FIT_S around ``guess`` (the rule's strike, frames), by least squares with one cubic per
    marker whose second and third derivatives may jump at a common join point t0 (the truncated power basis
    (t - t0)_+^2, (t - t0)_+^3); t0 is the grid point (TOUCHDOWN_STEP_FRAMES) of least residual sum of squares
    within TOUCHDOWN_SEARCH_S (the maximum-likelihood join point under white marker noise). Its 95 % confidence
    interval is the set of join points whose residual sum of squares lies within chi2(1, 0.95) residual variances
    of the least (likelihood ratio; Lerman 1980). Unfiltered data, because a zero-lag low-pass spreads the step
    symmetrically and only its centroid, after touchdown, survives (module doc).

    Returns None (keep the rule's strike) when the fitted span leaves the trial or holds missing data, when the
    least residual lies at the edge of the search, when the interval is wider than TOUCHDOWN_MAX_CI_S (noisy
    markers: a biased but steady rule beats an unbiased but scattered changepoint), or when after the join the
    ``landing`` marker (row of z) is not held above the path it was falling on (the floor pushes up, never down) or
    the ``shank`` rows (malleoli) are not, on average, held above theirs by more than their one-sided 95 % margin (a
    foot stopped in the air by turning about its ankle leaves the shank on its path: no floor).

    References
    ----------
    Hudson DJ 1966, J Am Stat Assoc 61:1097 (segmented curves with estimated join points; from memory).
    Lerman PM 1980, Appl Stat 29:77 (grid search and likelihood inference for the transition point; verified).
    Clark KP, Ryan LJ, Weyand PG 2017, J Exp Biol 220:247 (two-mass model: foot and shank stopped in the impact).
    """
    from scipy.stats import chi2, norm

    n = z.shape[1]
    lo = int(np.floor(guess - TOUCHDOWN_FIT_S[0] * rate_hz))
    hi = int(np.ceil(guess + TOUCHDOWN_FIT_S[1] * rate_hz)) + 1
    if lo < 0 or hi > n:
        return None
    y = z[:, lo:hi].T  # [frames, markers]
    if not np.isfinite(y).all():
        return None
    knots = np.arange(guess - TOUCHDOWN_SEARCH_S[0] * rate_hz, guess + TOUCHDOWN_SEARCH_S[1] * rate_hz + 1e-9,
                      TOUCHDOWN_STEP_FRAMES)
    d = (np.arange(lo, hi)[None, :] - knots[:, None]) / rate_hz  # [knot, frame], s
    after = np.where(d > 0.0, d, 0.0)
    x = np.stack([np.ones_like(d), d, d ** 2, d ** 3, after ** 2, after ** 3], axis=-1)  # [knot, frame, 6]
    # least squares for every knot at once: thin QR of each design matrix, residual = y minus its projection
    q, _ = np.linalg.qr(x)
    fitted = q @ (np.swapaxes(q, 1, 2) @ y[None])
    rss = ((y[None] - fitted) ** 2).sum(axis=(1, 2))
    best = int(np.argmin(rss))
    dof = y.size - x.shape[-1] * y.shape[1] - 1
    if best in (0, knots.size - 1) or dof <= 0:
        return None
    variance = rss[best] / dof
    inside = knots[rss <= rss[best] + chi2.ppf(0.95, 1) * variance]
    if inside.max() - inside.min() > TOUCHDOWN_MAX_CI_S * rate_hz:
        return None
    # a landing: after the join the floor holds the foot's landing marker and the shank's markers above the paths
    # they were falling on (the impact stops foot and shank together); the shank's rise, one-sided 95 %
    coef = np.linalg.lstsq(x[best], y, rcond=None)[0]  # [6, markers]
    span = d[best, -1]
    lead = np.array([0.0, 0.0, 0.0, 0.0, span ** 2, span ** 3])
    rise = lead @ coef  # per marker, m
    shank = list(shank)
    var_rise = lead @ np.linalg.solve(x[best].T @ x[best], lead) * variance
    if rise[landing] <= 0.0 or not shank:
        return None
    if rise[shank].mean() <= norm.ppf(0.95) * np.sqrt(var_rise / len(shank)):
        return None
    return float(knots[best])


def _detect_side(
    heights: Mapping[str, np.ndarray], rate_hz: float, knee_flexion: np.ndarray | None,
    unfiltered: np.ndarray | None = None,
) -> tuple[_SideEvents, np.ndarray]:
    n = next(iter(heights.values())).size
    rel = _heights_above_floor(heights)
    lowest = rel.min(axis=0)
    mask = _low_foot_mask(lowest, rate_hz)
    # one filter call per derivative order, over all the signals that need it
    velocities = _derivative(np.stack([*heights.values(), lowest]), 1, rate_hz)
    vz, lowest_vz = velocities[:-1], velocities[-1]
    contacts = runs_1d(mask)
    acc = dict(zip(STRIKE_MARKERS, _derivative(np.stack([heights[m] for m in STRIKE_MARKERS]), 2, rate_hz)))
    toe = _toe_name(heights)
    toe_z = heights[toe]
    toe_jerk = _derivative(toe_z, 3, rate_hz)
    # a toe-off can only be where the foot is leaving the floor: the toe landmark rising and the heel already lifted
    # (heel-off comes before toe-off in the push-off) above the height that counts as a low foot
    leaving = (vz[list(heights).index(toe)] > 0) & (rel[list(heights).index("heel")] > LOW_FOOT_THRESHOLD_M)
    toe_rel = rel[list(heights).index(toe)]  # the toe's height above its floor level

    before_fs, after_fs = (int(round(s * rate_hz)) for s in STRIKE_SEARCH_S)
    before_to, after_to = (int(round(s * rate_hz)) for s in TOE_OFF_SEARCH_S)
    refine_before, refine_after = (int(round(s * rate_hz)) for s in STRIKE_REFINE_S)

    strikes, toe_offs, strikes_fb, toe_offs_fb = [], [], [], []
    toe_off_peaks, toe_off_cut, toe_off_contact = [], [], []
    n_fallback = 0
    for start, end in contacts:
        fs = None
        # foot strike: only when the foot comes down inside the trial (the low run does not start at frame 0)
        if start > 0:
            lo, hi = _strike_window(lowest, start, end, before_fs, after_fs, refine_after)
            fb = _strike_fallback(lowest, lowest_vz, lo, hi)
            impact = _strike_primary(acc, lo, hi)
            if impact is None:
                # no acceleration peak: floor arrival, then Fellin. Expected when the recording ends during the
                # landing (no room for the peak), so only counted as a fallback inside the trial.
                fs = _floor_arrival(lowest, lo, hi)
                fs = fb if fs is None else fs
                n_fallback += int(end < n and start + after_fs < n)
            else:
                a = max(int(np.floor(impact)) - refine_before, 0)
                b = min(int(np.ceil(impact)) + refine_after, n)
                arrival = _floor_arrival(lowest, a, b)
                if arrival == a:  # already on the floor at the window start: find where it got there
                    arrival = _floor_arrival(lowest, max(start - 1, 0), b)
                arrest = _descent_arrest(vz, rel, int(round(impact)), a, b, before_fs)
                found = [t for t in (arrival, arrest) if t is not None]
                fs = min(found) if found else None
                if fs is None and end < n:  # never settles on the floor: keep the impact instant
                    fs, n_fallback = impact, n_fallback + 1
            if fs is not None and unfiltered is not None:
                # unfiltered heights of the same foot landmarks, then the malleoli: the touchdown changepoint
                landing = int(np.argmin(rel[:, min(int(round(fs)), n - 1)]))  # the landmark lowest at the strike
                refined = _touchdown_changepoint(unfiltered, fs, rate_hz, landing,
                                                 range(len(heights), unfiltered.shape[0]))
                fs = fs if refined is None else refined
            if fs is not None:
                strikes.append(fs)
                strikes_fb.append(np.nan if fb is None else fb)
        elif lowest[0] > FLOOR_TOLERANCE_M:
            # the recording starts while the foot comes down: no room for the acceleration peak, floor arrival only
            fs = _floor_arrival(lowest, 0, min(after_fs, end))
            if fs is not None:
                strikes.append(fs)
                strikes_fb.append(np.nan)
        # toe-off: only when the foot leaves the floor inside the trial
        if end < n:
            lo, hi = max(end - before_to, start + 1), min(end + after_to, n)
            fb = _toe_off_fallback(toe_rel, knee_flexion, lo, hi, start, end)
            to = _window_peak(toe_jerk, lo, hi, leaving)
            if to is None and start > 0:
                to, n_fallback = fb, n_fallback + 1
            if to is not None:
                toe_offs.append(to)
                toe_offs_fb.append(np.nan if fb is None else fb)
                toe_off_peaks.append(np.interp(to, np.arange(n), toe_jerk))
                toe_off_cut.append(start == 0 or end + after_to > n)
                toe_off_contact.append(np.nan if fs is None or start == 0 else to - fs)
    # A contact already under way when the recording starts may have ended just before it, and a search window cut
    # by the recording's end may miss the toe-off: such windows can hold only swing jerk. Keep a toe-off found
    # there only if its jerk peak is as sharp as the trial's other toe-offs.
    keep = np.ones(len(toe_offs), bool)
    cut, peaks = np.asarray(toe_off_cut, bool), np.asarray(toe_off_peaks, float)
    if cut.any() and (~cut).sum() >= 2:
        keep = ~cut | (peaks >= EDGE_PEAK_FRACTION * np.median(peaks[~cut]))
        # a window cut short can also hold the stance's own motion: a toe-off found there must end a contact of
        # about the usual length (one whose strike was seen)
        contact = np.asarray(toe_off_contact, float)
        whole = contact[~cut & np.isfinite(contact)]
        if whole.size >= 2:
            keep &= ~(cut & (contact < EDGE_CONTACT_FRACTION * np.median(whole)))
    side = _SideEvents(
        np.asarray(strikes, float), np.asarray(toe_offs, float)[keep],
        np.asarray(strikes_fb, float), np.asarray(toe_offs_fb, float)[keep], n_fallback,
    )
    return side, mask


def _strike_window(lowest: np.ndarray, start: int, end: int, before: int, after: int, settle: int) -> tuple[int, int]:
    """Foot-strike search window of a low run [start, end): from `before` frames ahead of it until `after` frames
    into it, or, when the foot's lowest landmark reaches its floor level (within FLOOR_TOLERANCE_M) later than that,
    until `settle` frames after it does. A forefoot marker that levels off just above the floor in late swing (a
    flat-foot hover, issue 13) starts the low run long before the heel lands; the landing lies where the foot
    actually comes down."""
    n = lowest.size
    hi = start + after
    on_floor = np.flatnonzero(lowest[start:end] <= FLOOR_TOLERANCE_M)
    if on_floor.size:
        hi = max(hi, start + int(on_floor[0]) + settle)
    return max(start - before, 0), min(hi, end, n)


def _strike_fallback(lowest: np.ndarray, lowest_vz: np.ndarray, lo: int, hi: int) -> float | None:
    """Fellin et al. 2010 style: first frame the lowest landmark stops descending (vertical velocity sign change)."""
    seg = lowest_vz[lo:hi]
    hits = np.flatnonzero((seg[:-1] < 0) & (seg[1:] >= 0))
    if hits.size == 0:
        return None
    k = hits[0]
    v0, v1 = seg[k], seg[k + 1]
    return float(lo + k + (-v0) / (v1 - v0))


def _toe_off_fallback(
    toe_rel: np.ndarray, knee_flexion: np.ndarray | None, lo: int, hi: int, start: int, end: int
) -> float | None:
    """Second toe-off rule: the toe marker rising 5 mm off its floor level (the definition of toe-off, read from
    position rather than jerk); when that marker gives nothing, peak knee extension (Fellin et al. 2010).

    Peak knee extension comes first only for distance running: in sprinting the knee's extension minimum is shallow
    and can lead toe-off by tens of ms, so it is kept as the last resort, not the check.
    """
    toe = _first_crossing_up(toe_rel, 0.005, lo, hi)
    if toe is not None or knee_flexion is None:
        return toe
    k = np.asarray(knee_flexion, float)
    # peak knee extension in the second half of the contact and just after it
    a = start + (end - start) // 2
    seg = k[a:hi]
    if seg.size >= 3 and np.isfinite(seg).all():
        i = int(np.argmin(seg))
        return _parabolic_peak(-k, a + i)
    return None


# --------------------------------------------------------------------------------------------
# public API
# --------------------------------------------------------------------------------------------
def is_treadmill(lm: "Landmarks") -> bool:
    """True when the pelvis barely moves forward (net speed < 1 m/s, common practice): a treadmill trial."""
    pelvis = _pelvis_centre(lm)
    ok = np.isfinite(pelvis[:, 0])
    idx = np.flatnonzero(ok)
    if idx.size < 2:
        raise LandmarkError("pelvis landmarks (ASIS/PSIS) missing; cannot tell treadmill from overground",
                            trial=getattr(lm, "trial", None))
    duration = (idx[-1] - idx[0]) / lm.rate_hz
    net = np.linalg.norm(pelvis[idx[-1], :2] - pelvis[idx[0], :2])
    return bool(net / max(duration, 1e-9) < TREADMILL_MAX_PELVIS_SPEED)


def _pelvis_centre(lm: "Landmarks") -> np.ndarray:
    available = [np.asarray(lm.points[m], float) for m in PELVIS_MARKERS if m in lm.points]
    if not available:
        raise LandmarkError("no pelvis landmark (ASIS/PSIS) found; speed needs the pelvis",
                            trial=getattr(lm, "trial", None))
    if len(available) == 1:
        return available[0]
    stacked = np.stack(available)
    seen = np.isfinite(stacked)
    count = seen.sum(axis=0)
    total = np.where(seen, stacked, 0.0).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):  # frames with no pelvis landmark stay NaN, silently
        return np.where(count > 0, total / count, np.nan)


def running_speed(lm: "Landmarks", events: GaitEvents, treadmill: bool) -> float:
    """Running speed in m/s.

    Overground: horizontal displacement of the pelvis centre (mean of ASIS and PSIS) between the first and
    last foot strike of the same leg (whole strides, so the within-stride speed fluctuation cancels).
    Treadmill: belt speed = median horizontal speed of the stance foot's lowest landmark (the one resting on
    the belt) over the middle half of each contact.
    """
    rate = lm.rate_hz
    if not treadmill:
        pelvis = _pelvis_centre(lm)
        spans = []
        for side in SIDES:
            fs = np.sort(np.asarray(events.foot_strikes_s.get(side, ()), float))
            if fs.size >= 2:
                spans.append((fs[0], fs[-1]))
        if spans:
            t0, t1 = max(spans, key=lambda s: s[1] - s[0])
        else:
            t0, t1 = 0.0, (pelvis.shape[0] - 1) / rate
        times = np.arange(pelvis.shape[0]) / rate
        ok = np.isfinite(pelvis[:, :2]).all(axis=1)
        p0 = np.array([np.interp(t0, times[ok], pelvis[ok, k]) for k in range(2)])
        p1 = np.array([np.interp(t1, times[ok], pelvis[ok, k]) for k in range(2)])
        return float(np.linalg.norm(p1 - p0) / max(t1 - t0, 1e-9))
    speeds = []
    for side in SIDES:
        names = [f"{side}_{m}" for m in FOOT_MARKERS if f"{side}_{m}" in lm.points]
        if not names:
            continue
        xyz = np.stack([np.asarray(lm.points[m], float) for m in names])  # [landmark, F, 3]
        heights = np.stack([_fill_nan(p[:, 2]) for p in xyz])
        lowest = np.argmin(heights - np.percentile(heights, FLOOR_PERCENTILE, axis=1, keepdims=True), axis=0)
        vel = np.stack([[_derivative(_fill_nan(p[:, k]), 1, rate) for k in range(2)] for p in xyz])  # [L, 2, F]
        # the stance foot's lowest landmark is the one on the belt
        horizontal = np.linalg.norm(vel[lowest, :, np.arange(lowest.size)], axis=1)
        fs = np.asarray(events.foot_strikes_s.get(side, ()), float)
        to = np.asarray(events.toe_offs_s.get(side, ()), float)
        for t_fs in fs:
            later = to[to > t_fs]
            if later.size == 0:
                continue
            a, b = t_fs * rate, later[0] * rate
            lo, hi = int(np.ceil(a + 0.25 * (b - a))), int(np.floor(a + 0.75 * (b - a)))
            if hi > lo:
                speeds.append(horizontal[lo:hi + 1])
    if not speeds:
        raise EventError("no complete foot contact found, so the treadmill belt speed is unknown",
                         trial=getattr(lm, "trial", None), code="few_strides")
    return float(np.median(np.concatenate(speeds)))


def _pair_contacts(fs: np.ndarray, to: np.ndarray) -> np.ndarray:
    """[n, 2] (foot strike, toe-off) per contact; toe-off NaN when none falls before the next foot strike."""
    nxt = np.append(fs[1:], np.inf)
    j = np.searchsorted(to, fs, side="right")  # first toe-off after each foot strike
    cand = np.full(fs.size, np.nan)
    has = j < to.size
    cand[has] = to[j[has]]
    cand[~(cand < nxt)] = np.nan
    return np.stack([fs, cand], axis=1) if fs.size else np.empty((0, 2))


def _flight_times(foot_strikes: Mapping[str, np.ndarray], toe_offs: Mapping[str, np.ndarray]) -> np.ndarray:
    """Time from each toe-off to the other foot's next strike (s); negative = double support (no flight)."""
    flights = []
    for side, other in (("left", "right"), ("right", "left")):
        contacts = _pair_contacts(np.sort(foot_strikes[other]), np.sort(toe_offs[other]))
        for t in np.sort(foot_strikes[side]):
            prev = contacts[contacts[:, 0] < t]
            if prev.shape[0] and np.isfinite(prev[-1, 1]):
                flights.append(t - prev[-1, 1])
    return np.asarray(flights, float)


def _check_strides(foot_strikes: Mapping[str, np.ndarray], toe_offs: Mapping[str, np.ndarray], rate_hz: float,
                   duration_s: float, trial: str | None, min_strides: int) -> None:
    # walking first: a walk with few strikes found is still a walk, not a short run
    flights = _flight_times(foot_strikes, toe_offs)
    if flights.size and np.median(flights) < 1.0 / rate_hz:
        raise EventError(
            f"no flight phase: one foot lands before the other leaves the ground (median "
            f"{-1000 * np.median(flights):.0f} ms with both feet down). This is walking, not a run: hamstride "
            "analyses running (from jogging to sprinting), where both feet leave the ground between steps.",
            trial=trial, code="not_running",
        )
    for side in SIDES:
        n_fs = foot_strikes[side].size
        if n_fs - 1 < min_strides:
            raise EventError(
                f"too few strides: the {side} foot has {n_fs} foot strike(s) in {duration_s:.2f} s of data, so "
                f"{max(n_fs - 1, 0)} complete stride(s) (foot strike to next foot strike); at least {min_strides} "
                "needed per leg. Record a longer trial (capture volume covering at least two strides per leg) "
                "or check that both feet are labelled.",
                trial=trial, code="few_strides",
            )


def _c3d_events(c3d_events: Iterable) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    fs = {s: [] for s in SIDES}
    to = {s: [] for s in SIDES}
    for ev in c3d_events:
        side = str(getattr(ev, "side", "")).lower()
        kind = str(getattr(ev, "kind", "")).lower()
        if side not in SIDES:
            continue
        if kind == "foot_strike":
            fs[side].append(float(ev.time_s))
        elif kind == "toe_off":
            to[side].append(float(ev.time_s))
    return ({s: np.unique(np.asarray(v, float)) for s, v in fs.items()},
            {s: np.unique(np.asarray(v, float)) for s, v in to.items()})


def _rule_consistency(side: str, side_events: _SideEvents, fs: np.ndarray, to: np.ndarray,
                      fs_fallback: np.ndarray, to_fallback: np.ndarray) -> list[str]:
    """Warnings when the fallback rule had to be used, or when the two rules disagree erratically.

    The position-based fallback rule sits a steady few tens of ms from the primary rule on a compliant foot (the heel
    pad keeps compressing after touchdown and rebounds before toe-off): a steady offset says nothing about the
    markers. Erratic differences do, so the check is on each event's difference from the side's median difference.
    """
    out = []
    if side_events.n_fallback_used:
        out.append(f"{side}: {side_events.n_fallback_used} event(s) found only by the fallback rule")
    for label, prim, fb in (("foot strike", fs, fs_fallback), ("toe-off", to, to_fallback)):
        diff = prim - fb
        diff = diff[np.isfinite(diff)]
        if diff.size < 3:  # a median of one or two differences says nothing about their spread
            continue
        offset = np.median(diff)
        share = np.mean(np.abs(diff - offset) > RULE_DISAGREEMENT_S)
        if share > 0.25:
            out.append(
                f"{side} {label}: the two marker rules disagree erratically, by more than "
                f"{1000 * RULE_DISAGREEMENT_S:.0f} ms beyond their usual {1000 * offset:+.0f} ms in {share:.0%} of "
                "events; check the foot markers"
            )
    return out


def _compare(label: str, side: str, reference: np.ndarray, markers: np.ndarray, rate_hz: float) -> list[str]:
    """C3D event vs nearest marker event of the same kind and side; report > 2 frames apart, and marker events
    inside the span of the file's events that have no file event within 30 ms (an event missing from the file)."""
    out = []
    if reference.size and markers.size:
        inside = markers[(markers > reference.min()) & (markers < reference.max())]
        for t in inside[np.min(np.abs(inside[:, None] - reference[None, :]), axis=1) > MISSING_EVENT_S]:
            out.append(f"{side} {label} found from markers at {t:.3f} s has no C3D event; check the C3D events")
    for t in reference:
        if markers.size == 0:
            out.append(f"{side} {label} at {t:.3f} s in the C3D file has no marker-detected counterpart")
            continue
        nearest = markers[np.argmin(np.abs(markers - t))]
        frames = (nearest - t) * rate_hz
        if abs(frames) > C3D_DISAGREEMENT_FRAMES:
            out.append(
                f"{side} {label} at {t:.3f} s (C3D) vs {nearest:.3f} s (markers): {frames:+.1f} frames "
                f"({1000 * (nearest - t):+.0f} ms); check the C3D event labelling"
            )
    return out


def detect_events(
    lm: "Landmarks",
    *,
    c3d_events: Iterable = (),
    treadmill: bool | None = None,
    knee_flexion: Mapping[str, np.ndarray] | None = None,
    min_strides: int = 1,
    unfiltered: "Landmarks | None" = None,
) -> GaitEvents:
    """Foot strikes and toe-offs of both feet.

    Uses the C3D events when the file has foot strikes and toe-offs for both sides (marker events are still
    computed and any C3D event more than 2 frames from its marker counterpart is listed in `disagreements`);
    otherwise the marker rules (Handsaker et al. 2016 primary, Fellin et al. 2010 fallback/consistency).
    The vertical-only rules serve overground and treadmill trials alike, so `treadmill` (accepted for callers
    that know it) does not change the result.
    ``unfiltered``: the same landmarks before low-pass filtering (same frames, lab frame). When given, each marker
    foot strike is refined to the touchdown changepoint of the foot markers' unfiltered heights where that is
    precise (``_touchdown_changepoint``); the pipeline passes them. Without them the rule's strike is kept.
    Raises EventError 'few_strides' when a leg has fewer than `min_strides` complete strides and
    'not_running' when there is no flight phase between steps (walking).
    """
    rate = float(lm.rate_hz)
    trial = getattr(lm, "trial", None)
    knee_flexion = knee_flexion or {}
    c3d_fs, c3d_to = _c3d_events(c3d_events)
    use_c3d = all(c3d_fs[s].size and c3d_to[s].size for s in SIDES)
    warnings: list[str] = []
    marker_fs = {s: np.empty(0) for s in SIDES}
    marker_to = {s: np.empty(0) for s in SIDES}
    fallback_fs: dict[str, np.ndarray] = {}
    fallback_to: dict[str, np.ndarray] = {}
    n_frames = int(lm.n_frames) if hasattr(lm, "n_frames") else len(next(iter(lm.points.values())))
    try:
        for side in SIDES:
            heights = _foot_heights(lm, side)
            side_events, _ = _detect_side(heights, rate, knee_flexion.get(side),
                                          _unfiltered_heights(unfiltered, side, heights, n_frames))
            side_events, dropped = _drop_events_in_gaps(side_events, _missing_foot_frames(lm, side), rate)
            if dropped:
                warnings.append(
                    f"{side}: event(s) near {', '.join(f'{t:.2f} s' for t in dropped)} not used: foot markers "
                    "missing there (gap too long to fill); the strides around them are left out"
                )
            marker_fs[side] = side_events.strikes / rate
            marker_to[side] = side_events.toe_offs / rate
            fallback_fs[side] = side_events.strikes_fallback / rate
            fallback_to[side] = side_events.toe_offs_fallback / rate
            warnings += _rule_consistency(side, side_events, marker_fs[side], marker_to[side],
                                          fallback_fs[side], fallback_to[side])
    except LandmarkError as err:
        if not use_c3d:
            raise
        warnings.append(f"marker events not computed ({err.message}); the C3D events are used unchecked")
        marker_fs = marker_to = None
    duration = (n_frames - 1) / rate

    disagreements: list[str] = []
    if use_c3d:
        if marker_fs is not None:
            for side in SIDES:
                disagreements += _compare("foot strike", side, c3d_fs[side], marker_fs[side], rate)
                disagreements += _compare("toe-off", side, c3d_to[side], marker_to[side], rate)
        foot_strikes, toe_offs, method = c3d_fs, c3d_to, "c3d"
    else:
        if any(c3d_fs[s].size or c3d_to[s].size for s in SIDES):
            warnings.append("the C3D file has only some foot strike/toe-off events; marker events used instead")
        foot_strikes, toe_offs, method = marker_fs, marker_to, "markers"
    _check_strides(foot_strikes, toe_offs, rate, duration, trial, min_strides)
    return GaitEvents(
        foot_strikes_s={s: np.sort(foot_strikes[s]) for s in SIDES},
        toe_offs_s={s: np.sort(toe_offs[s]) for s in SIDES},
        method=method,
        disagreements=tuple(disagreements),
        warnings=tuple(warnings),
        fallback_foot_strikes_s=fallback_fs,
        fallback_toe_offs_s=fallback_to,
        marker_foot_strikes_s={s: np.sort(marker_fs[s]) for s in SIDES} if marker_fs is not None else {},
        marker_toe_offs_s={s: np.sort(marker_to[s]) for s in SIDES} if marker_to is not None else {},
        foot_strike_sources={s: ("file" if method == "c3d" else "markers",) * foot_strikes[s].size for s in SIDES},
    )


def drop_events_near_edges(events: GaitEvents, n_frames: int, rate_hz: float, *, start: bool, end: bool,
                           guard_s: float = GAP_GUARD_S) -> tuple[GaitEvents, list[float]]:
    """Marker events within ``guard_s`` of the first (``start``) or last (``end``) frame removed: at the edge of a
    capture volume markers have only just appeared (or are about to vanish), so, as next to a gap, they are not
    trusted. Events read from the file are kept. Returns the events and the times dropped (s)."""
    if events.method != "markers" or not (start or end):
        return events, []
    lo = guard_s if start else -np.inf
    hi = (n_frames - 1) / rate_hz - guard_s if end else np.inf
    dropped: list[float] = []

    def keep(times: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
        out = {}
        for side, t in times.items():
            t = np.asarray(t, float)
            inside = (t >= lo) & (t <= hi)
            dropped.extend(float(x) for x in t[~inside])
            out[side] = t[inside]
        return out

    kept = replace(events, foot_strikes_s=keep(events.foot_strikes_s), toe_offs_s=keep(events.toe_offs_s))
    return kept, sorted(dropped)
