"""Strides: foot strike to the next foot strike of the same leg, time-normalised to 0..100 % (101 points).

Gait-cycle convention (design.md): 0 % = foot strike, 100 % = next foot strike of the same leg; late swing
runs from the swing-phase peak knee flexion to the next foot strike.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

import numpy as np
from scipy.interpolate import CubicSpline

from .events import GaitEvents
from .numerics import SIDES

__all__ = ["DEFAULT_STRIDE_TIME_RANGE_S", "DEFAULT_CONTACT_RANGE_S", "Stride", "cut_strides", "normalise",
           "normalise_strides", "window_frames"]

# Plausible stride and contact times, sprinting to jogging (common practice, from the values below). Sprinting:
# stride 0.40-0.46 s, contact 0.09-0.12 s [M, references.md]. Jogging at 3 m/s: stride about 0.63-0.80 s
# (75-95 strides/min; metabolic optimum 84.8 strides/min = 0.71 s; Lieberman et al. 2015, J Exp Biol 218:3406
# [V, abstract]), contact about 0.25-0.30 s [M]. The upper limits leave room for a slow jog (60 strides/min, 0.33 s
# contacts); a missed foot strike in a sprint (about 0.9 s) is caught by its two toe-offs.
DEFAULT_STRIDE_TIME_RANGE_S = (0.3, 1.0)
DEFAULT_CONTACT_RANGE_S = (0.06, 0.4)


@dataclass(frozen=True)
class Stride:
    """One stride of one leg. Times in s from the first frame; percentages of the stride (0..100)."""

    side: str
    index: int                 # 0-based, per side, in time order (invalid strides keep their index)
    foot_strike_s: float
    toe_off_s: float           # NaN when no toe-off was found inside the stride
    next_foot_strike_s: float
    start_frame: int           # first frame at or after the foot strike
    end_frame: int             # last frame at or before the next foot strike
    stride_time_s: float
    contact_time_s: float
    toe_off_pct: float
    late_swing_start_pct: float  # swing-phase peak knee flexion; NaN without knee angles
    valid: bool
    reason: str                # empty when valid
    event_source: str = "markers"  # where the foot strike and toe-off came from: 'plate', 'markers' or 'file'


def _peak_index(y: np.ndarray, lo: int, hi: int) -> float:
    """Sub-frame index of the maximum of y in [lo, hi] (parabolic refinement)."""
    seg = y[lo:hi + 1]
    if seg.size == 0 or not np.isfinite(seg).any():
        return np.nan
    i = lo + int(np.nanargmax(seg))
    if lo < i < hi and np.isfinite(y[i - 1:i + 2]).all():
        a, b, c = y[i - 1], y[i], y[i + 1]
        denom = a - 2 * b + c
        if denom < 0:
            return i + 0.5 * (a - c) / denom
    return float(i)


def cut_strides(
    events: GaitEvents,
    rate_hz: float,
    n_frames: int,
    knee_flexion: Mapping[str, np.ndarray] | None,
    *,
    stride_time_range: tuple[float, float] = DEFAULT_STRIDE_TIME_RANGE_S,
    contact_range: tuple[float, float] = DEFAULT_CONTACT_RANGE_S,
) -> tuple[Stride, ...]:
    """Cut every complete stride (foot strike to next foot strike of the same leg, both inside the trial).

    Partial strides before the first or after the last foot strike are dropped. A stride whose stride time
    or contact time falls outside the ranges (defaults: issue 3, common practice), or without a toe-off,
    is kept with valid=False and a reason. Late swing starts at the peak knee flexion between toe-off and
    the next foot strike (design.md).
    """
    last_time = (n_frames - 1) / rate_hz
    knee_flexion = knee_flexion or {}
    strides: list[Stride] = []
    for side in SIDES:
        fs = np.asarray(events.foot_strikes_s.get(side, ()), float)
        order = np.argsort(fs, kind="stable")
        default = "file" if events.method.startswith("c3d") else "markers"
        sources = np.asarray(events.foot_strike_sources.get(side) or (default,) * fs.size, object)[order]
        fs = fs[order]
        inside_trial = (fs >= 0) & (fs <= last_time)
        fs, sources = fs[inside_trial], sources[inside_trial]
        to = np.sort(np.asarray(events.toe_offs_s.get(side, ()), float))
        knee = knee_flexion.get(side)
        for i in range(fs.size - 1):
            t0, t1 = fs[i], fs[i + 1]
            inside = to[(to > t0) & (to < t1)]
            t_to = inside[0] if inside.size else np.nan
            stride_time = t1 - t0
            contact = t_to - t0
            toe_pct = 100.0 * contact / stride_time
            late_pct = np.nan
            if knee is not None and np.isfinite(t_to):
                k = np.asarray(knee, float)
                peak = _peak_index(k, int(np.ceil(t_to * rate_hz)), int(np.floor(t1 * rate_hz)))
                late_pct = 100.0 * (peak / rate_hz - t0) / stride_time
            reasons = []
            if not stride_time_range[0] <= stride_time <= stride_time_range[1]:
                reasons.append(
                    f"stride time {stride_time:.3f} s outside {stride_time_range[0]:.2f}-{stride_time_range[1]:.2f} s"
                    " (a missed or extra foot strike?)"
                )
            if not np.isfinite(t_to):
                reasons.append("no toe-off found between the foot strikes")
            elif len(inside) > 1:
                reasons.append(f"{len(inside)} toe-offs between the foot strikes (an extra event?)")
            elif not contact_range[0] <= contact <= contact_range[1]:
                reasons.append(
                    f"contact time {contact:.3f} s outside {contact_range[0]:.2f}-{contact_range[1]:.2f} s"
                )
            strides.append(Stride(
                side=side, index=i, foot_strike_s=float(t0), toe_off_s=float(t_to), next_foot_strike_s=float(t1),
                start_frame=int(np.ceil(t0 * rate_hz - 1e-9)), end_frame=int(np.floor(t1 * rate_hz + 1e-9)),
                stride_time_s=float(stride_time), contact_time_s=float(contact), toe_off_pct=float(toe_pct),
                late_swing_start_pct=float(late_pct), valid=not reasons, reason="; ".join(reasons),
                event_source=str(sources[i]),
            ))
    return tuple(strides)


def normalise(signal: np.ndarray, stride: Stride, rate_hz: float, n_points: int = 101) -> np.ndarray:
    """Time-normalise `signal` [F, ...] from foot strike (0 %) to next foot strike (100 %) -> [n_points, ...].

    Samples at the fractional event times by a cubic spline through the stride's frames (plus two frames of
    margin each side); columns containing NaN in that window fall back to linear interpolation.
    """
    x = np.asarray(signal, float)
    n = x.shape[0]
    t_query = np.linspace(stride.foot_strike_s, stride.next_foot_strike_s, n_points) * rate_hz  # in frames
    if t_query[0] < 0 or t_query[-1] > n - 1:
        raise ValueError("stride extends beyond the signal")
    lo = max(int(np.floor(t_query[0])) - 2, 0)
    hi = min(int(np.ceil(t_query[-1])) + 2, n - 1)
    window = x[lo:hi + 1].reshape(hi - lo + 1, -1)
    out = np.empty((n_points, window.shape[1]))
    finite = np.isfinite(window).all(axis=0)
    if finite.any() and window.shape[0] >= 4:
        out[:, finite] = CubicSpline(np.arange(window.shape[0]), window[:, finite], axis=0)(t_query - lo)
    else:
        finite[:] = False
    if (~finite).any():
        i0 = np.clip(np.floor(t_query).astype(int), lo, hi - 1) - lo
        frac = (t_query - lo - i0)[:, None]
        cols = window[:, ~finite]
        out[:, ~finite] = cols[i0] * (1 - frac) + cols[i0 + 1] * frac
    return out.reshape((n_points,) + x.shape[1:])


def normalise_strides(signal: np.ndarray, strides, rate_hz: float, n_points: int = 101) -> np.ndarray:
    """Time-normalise ``signal`` [F, ...] over many strides at once -> [strides, n_points, ...].

    Columns finite over the whole trial are sampled from one cubic spline through every frame (not-a-knot ends,
    away from the strides), evaluated at every stride's fractional event times; the other columns go stride by
    stride through :func:`normalise` (cubic spline where the stride is gap-free, otherwise linear).
    """
    x = np.asarray(signal, float)
    n = x.shape[0]
    flat = x.reshape(n, -1)
    strides = list(strides)
    queries = np.array([np.linspace(s.foot_strike_s, s.next_foot_strike_s, n_points) * rate_hz for s in strides])
    out = np.empty((len(strides), n_points, flat.shape[1]))
    if not strides:
        return out.reshape((0, n_points) + x.shape[1:])
    if queries[:, 0].min() < 0 or queries[:, -1].max() > n - 1:
        raise ValueError("stride extends beyond the signal")
    whole = np.isfinite(flat).all(axis=0) if n >= 4 else np.zeros(flat.shape[1], dtype=bool)
    if whole.any():
        spline = CubicSpline(np.arange(n), flat[:, whole], axis=0)  # not-a-knot ends
        out[:, :, whole] = spline(queries.ravel()).reshape(len(strides), n_points, -1)
    rest = np.flatnonzero(~whole)
    if rest.size:
        # as normalise(): a window of the stride's frames plus two each side; linear where it holds a gap
        lo = np.maximum(np.floor(queries[:, 0]).astype(int) - 2, 0)
        hi = np.minimum(np.ceil(queries[:, -1]).astype(int) + 2, n - 1)
        gaps = np.concatenate([np.zeros((1, rest.size), dtype=int), np.cumsum(~np.isfinite(flat[:, rest]), axis=0)])
        gap_free = ((gaps[hi + 1] - gaps[lo]) == 0) & ((hi - lo + 1) >= 4)[:, None]  # [stride, column]
        index = np.clip(np.floor(queries).astype(int), lo[:, None], hi[:, None] - 1)  # [stride, point]
        frac = (queries - index)[:, :, None]
        linear = flat[:, rest][index] * (1 - frac) + flat[:, rest][index + 1] * frac
        out[:, :, rest] = linear
        for k in np.flatnonzero(gap_free.any(axis=1)):  # strides where some of these columns have no gap: spline
            columns = rest[gap_free[k]]
            out[k][:, columns] = normalise(flat[:, columns], strides[k], rate_hz, n_points)
    return out.reshape((len(strides), n_points) + x.shape[1:])


def window_frames(starts, stops, n_frames: int) -> tuple[np.ndarray, np.ndarray]:
    """Frames of many half-open windows ``[start, stop)`` as one padded index matrix [W, L] (L the longest window,
    indices kept inside 0..n_frames-1) and the mask of the frames that belong to each window."""
    starts = np.asarray(starts, dtype=int)
    stops = np.minimum(np.asarray(stops, dtype=int), n_frames)
    width = int(max(np.max(stops - starts, initial=0), 0))
    frames = starts[:, None] + np.arange(width)[None, :]
    return np.clip(frames, 0, max(n_frames - 1, 0)), frames < stops[:, None]
