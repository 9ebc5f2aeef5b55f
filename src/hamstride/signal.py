"""Gap filling and zero-lag low-pass filtering of marker trajectories.

* Short interior gaps are bridged with a cubic spline (cubic splines suit short gaps; Howarth & Callaghan 2010).
  The default limit of 10 frames is common practice; longer gaps and gaps at the ends stay NaN and are reported.
* Low-pass: 2nd-order Butterworth run forward and backward (zero lag) with the dual-pass cutoff correction of
  Robertson & Dowling 2003 (J Electromyogr Kinesiol 13:569), so the -3 dB point of the two passes is the requested
  cutoff.
* Cutoff: fixed, or chosen per trial by Winter's residual analysis (Winter 2009, Biomechanics and Motor Control of
  Human Movement, sec. 3.4.4.3). One cutoff is used for every marker of a trial so that kinematics feeding inverse
  dynamics are filtered alike (Bezodis et al., ISBS).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.ndimage import convolve1d
from scipy.signal import butter, filtfilt, savgol_coeffs, savgol_filter

from .errors import ConfigError
from .numerics import runs

__all__ = ["DEFAULT_MAX_GAP_FRAMES", "EDGE_GAP_NOTE", "FILTER_ORDER", "savgol_derivative",
           "dual_pass_correction", "design_cutoff_hz", "lowpass", "Gap", "GapReport", "find_gaps", "fill_gaps",
           "residuals", "residual_cutoff", "FilterInfo", "smooth_landmarks"]

if TYPE_CHECKING:  # pragma: no cover
    from .landmarks import Landmarks

DEFAULT_MAX_GAP_FRAMES = 10  # common practice (references.md, Filtering)
EDGE_GAP_NOTE = "at the start or end of the trial"  # how FilterInfo.long_gaps names a gap touching an end
FILTER_ORDER = 2


# --------------------------------------------------------------------------- Savitzky-Golay derivatives
@functools.lru_cache(maxsize=32)
def _savgol_operator(window: int, poly: int, order: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Interior kernel and the two edge matrices of a Savitzky-Golay derivative (unit frame spacing).

    Edges as scipy's ``mode="interp"``: a degree-``poly`` least-squares polynomial through the first (last)
    ``window`` samples, differentiated at the first (last) ``window // 2`` positions; being linear in the data, each
    edge is one fixed matrix.
    """
    half = window // 2
    positions = np.arange(window, dtype=float)
    fit = np.linalg.pinv(np.vander(positions, poly + 1, increasing=True))  # samples -> polynomial coefficients
    powers = np.arange(poly + 1)
    factor = np.array([math.perm(int(k), order) for k in powers], dtype=float)  # d^order t^k = k!/(k-order)! t^(k-order)

    def at(where):
        exponent = np.clip(powers - order, 0, None)
        return factor * np.where(powers >= order, where[:, None] ** exponent, 0.0)

    left = at(positions[:half]) @ fit
    right = at(positions[window - half:]) @ fit
    return savgol_coeffs(window, poly, deriv=order), left, right


def savgol_derivative(x: np.ndarray, window: int, poly: int, order: int, rate_hz: float) -> np.ndarray:
    """Zero-phase derivative of ``order`` along the last axis by a Savitzky-Golay filter (Savitzky & Golay 1964),
    edges fitted like scipy's ``savgol_filter(mode="interp")``; the fixed edge matrices are computed once per window,
    so many short signals cost one convolution and two small matrix products."""
    x = np.asarray(x, dtype=float)
    if x.shape[-1] < window:  # scipy explains the problem
        return savgol_filter(x, window, poly, deriv=order, delta=1.0 / rate_hz, mode="interp")
    kernel, left, right = _savgol_operator(window, poly, order)
    half = window // 2
    y = convolve1d(x, kernel, axis=-1, mode="constant")
    if half:
        y[..., :half] = x[..., :window] @ left.T
        y[..., -half:] = x[..., -window:] @ right.T
    return y * float(rate_hz) ** order


# --------------------------------------------------------------------------- Butterworth
def dual_pass_correction(n_passes: int = 2, order: int = 2) -> float:
    """Cutoff correction C for ``n_passes`` passes of an ``order``-th order Butterworth filter.

    Robertson & Dowling 2003: C = (2**(1/n) - 1)**(1/4) for a 2nd-order filter (n = 2 gives 0.802); in general the
    exponent is 1/(2*order). Design each pass at (warped) fc / C so the cascade is -3 dB at fc.
    """
    if n_passes < 1 or order < 1:
        raise ValueError("n_passes and order must be at least 1")
    return float((2.0 ** (1.0 / n_passes) - 1.0) ** (1.0 / (2 * order)))


def design_cutoff_hz(rate_hz: float, cutoff_hz: float, n_passes: int = 2, order: int = FILTER_ORDER) -> float:
    """Single-pass design frequency giving a cascade -3 dB point exactly at ``cutoff_hz``.

    The correction is applied to the pre-warped frequency, tan(pi fc / fs) / C (Robertson & Dowling 2003), and
    mapped back to a digital frequency for scipy's bilinear design.
    """
    _check_cutoff(rate_hz, cutoff_hz)
    warped = math.tan(math.pi * cutoff_hz / rate_hz) / dual_pass_correction(n_passes, order)
    return rate_hz / math.pi * math.atan(warped)


def _check_cutoff(rate_hz: float, cutoff_hz: float) -> None:
    if not (rate_hz > 0 and 0 < cutoff_hz < rate_hz / 2):
        raise ConfigError(
            f"low-pass cutoff {cutoff_hz:g} Hz is not between 0 and half the capture rate ({rate_hz / 2:g} Hz); "
            "choose a smaller --cutoff"
        )


def _coefficients(rate_hz: float, cutoff_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """One pass of the 2nd-order Butterworth low-pass (``scipy.signal.butter``, bilinear design with pre-warping) at
    the dual-pass-corrected design frequency (Robertson & Dowling 2003, :func:`design_cutoff_hz`)."""
    _check_cutoff(rate_hz, cutoff_hz)
    return butter(FILTER_ORDER, design_cutoff_hz(rate_hz, cutoff_hz), btype="low", fs=rate_hz)


def _padlen(n_frames: int, rate_hz: float, cutoff_hz: float) -> int:
    # Odd (point-reflected) extension of three cutoff periods, at least scipy's default of 9 samples: the start-up
    # transient of a 10 m/s forward ramp then decays to < 0.01 mm at the ends (one period left 0.7 mm).
    return int(min(n_frames - 1, max(3 * (FILTER_ORDER + 1), math.ceil(3 * rate_hz / cutoff_hz))))


def _filter_columns(x2: np.ndarray, b: np.ndarray, a: np.ndarray, rate_hz: float, cutoff_hz: float) -> np.ndarray:
    """filtfilt of a finite [F, C] block along frames (all columns at once)."""
    n = x2.shape[0]
    if n < 2:
        return x2.copy()
    return filtfilt(b, a, x2, axis=0, padtype="odd", padlen=_padlen(n, rate_hz, cutoff_hz))


def _group_by_mask(mask: np.ndarray, cols: np.ndarray) -> list[np.ndarray]:
    """Columns with identical frame masks (e.g. x, y, z of one marker) grouped so they are processed together."""
    groups: dict[bytes, list[int]] = {}
    for c in cols:
        groups.setdefault(np.packbits(mask[:, c]).tobytes(), []).append(int(c))
    return [np.asarray(g) for g in groups.values()]


def lowpass(x: np.ndarray, rate_hz: float, cutoff_hz: float, axis: int = 0) -> np.ndarray:
    """Zero-lag 2nd-order Butterworth low-pass (two passes, Robertson & Dowling 2003 correction) along ``axis``.

    All columns are filtered in one call. NaN samples stay NaN; each finite stretch of a column containing NaN is
    filtered on its own (stretches shorter than 3 frames are left unfiltered).
    """
    _check_cutoff(rate_hz, cutoff_hz)
    arr = np.moveaxis(np.asarray(x, dtype=float), axis, 0)
    shape = arr.shape
    x2 = arr.reshape(shape[0], -1)
    b, a = _coefficients(rate_hz, cutoff_hz)
    finite = np.isfinite(x2)
    out = np.full_like(x2, np.nan)
    whole = finite.all(axis=0)
    if whole.any():
        out[:, whole] = _filter_columns(x2[:, whole], b, a, rate_hz, cutoff_hz)
    partial = np.nonzero(~whole & finite.any(axis=0))[0]
    for group in _group_by_mask(finite, partial):
        _, starts, stops = runs(finite[:, group[:1]])
        for s, e in zip(starts, stops):
            block = x2[s:e, group]
            out[s:e, group] = _filter_columns(block, b, a, rate_hz, cutoff_hz) if e - s >= 3 else block
    return np.moveaxis(out.reshape(shape), 0, axis)


# --------------------------------------------------------------------------- gaps
@dataclass(frozen=True)
class Gap:
    """A run of missing frames in one column (flat index over the trailing dimensions)."""

    column: int
    start: int  # first missing frame
    n_frames: int
    at_edge: bool  # touches the first or last frame (never filled: no data on one side)


@dataclass(frozen=True)
class GapReport:
    filled: tuple[Gap, ...]
    unfilled: tuple[Gap, ...]


def find_gaps(x: np.ndarray) -> tuple[Gap, ...]:
    """All NaN runs along axis 0 of ``x`` (any trailing shape), column = flat index of the trailing dimensions."""
    x2 = np.asarray(x, dtype=float).reshape(len(x), -1)
    cols, starts, stops = runs(~np.isfinite(x2))
    n = x2.shape[0]
    return tuple(
        Gap(int(c), int(s), int(e - s), bool(s == 0 or e == n)) for c, s, e in zip(cols, starts, stops)
    )


def fill_gaps(x: np.ndarray, max_gap_frames: int = DEFAULT_MAX_GAP_FRAMES) -> tuple[np.ndarray, GapReport]:
    """Fill interior NaN runs of at most ``max_gap_frames`` frames with a cubic spline along axis 0.

    The spline passes through every finite sample of the column (not-a-knot ends); columns with the same missing
    frames are fitted together. Longer gaps and gaps touching the first/last frame are left NaN and reported.
    """
    arr = np.asarray(x, dtype=float)
    x2 = arr.reshape(arr.shape[0], -1).copy()
    gaps = find_gaps(x2)
    short = [g for g in gaps if not g.at_edge and g.n_frames <= max_gap_frames]
    long_ = [g for g in gaps if g.at_edge or g.n_frames > max_gap_frames]
    finite = np.isfinite(x2)
    frames = np.arange(x2.shape[0], dtype=float)
    short_cols = np.unique([g.column for g in short]).astype(int)
    for group in _group_by_mask(finite, short_cols):
        ok = finite[:, group[0]]
        to_fill = np.concatenate(
            [np.arange(g.start, g.start + g.n_frames) for g in short if g.column == group[0]]
        )
        if ok.sum() < 4:  # a cubic needs four samples; leave it and report below
            long_.extend(g for g in short if g.column in set(group.tolist()))
            continue
        x2[np.ix_(to_fill, group)] = CubicSpline(frames[ok], x2[ok][:, group], axis=0)(frames[to_fill])
    not_filled = set(long_)
    filled = tuple(g for g in short if g not in not_filled)
    unfilled = tuple(sorted(long_, key=lambda g: (g.column, g.start)))
    return x2.reshape(arr.shape), GapReport(filled=filled, unfilled=unfilled)


# --------------------------------------------------------------------------- residual analysis
def residuals(x: np.ndarray, rate_hz: float, cutoffs_hz: np.ndarray) -> np.ndarray:
    """Winter's residual R(fc) = sqrt(mean((x - x_filtered)**2)) for each cutoff and column: shape [n_cutoffs, C].

    Computed in the frequency domain, all cutoffs at once: by Parseval, R(fc)^2 = sum_f (1 - G(f))^2 |X(f)|^2 / N^2
    with G the gain of the dual-pass filter (2nd-order Butterworth, bilinear design at the Robertson & Dowling 2003
    corrected cutoff: G = 1 / (1 + (C tan(pi f / fs) / tan(pi fc / fs))^4)). The straight line through the first and
    last frames is removed first (the filter passes it unchanged) so the FFT's periodic extension has no jump.
    Only columns without NaN are used (the rest are NaN in the result).
    """
    x2 = np.asarray(x, dtype=float).reshape(len(x), -1)
    whole = np.isfinite(x2).all(axis=0)
    out = np.full((len(cutoffs_hz), x2.shape[1]), np.nan)
    if not whole.any():
        return out
    data = x2 if whole.all() else x2[:, whole]
    n = data.shape[0]
    ramp = np.linspace(0.0, 1.0, n)[:, None]
    detrended = data - (data[0] + (data[-1] - data[0]) * ramp)
    spectrum = np.fft.rfft(detrended, axis=0)
    power = spectrum.real ** 2 + spectrum.imag ** 2  # |X(f)|^2, [n_freq, C]
    weight = np.full(power.shape[0], 2.0)  # one-sided spectrum: count each frequency twice but DC and Nyquist
    weight[0] = 1.0
    if n % 2 == 0:
        weight[-1] = 1.0
    freqs = np.fft.rfftfreq(n, 1.0 / rate_hz)
    correction = dual_pass_correction(2, FILTER_ORDER)
    ratio = (correction * np.tan(np.pi * freqs / rate_hz))[None, :] / np.tan(
        np.pi * np.asarray(cutoffs_hz, dtype=float)[:, None] / rate_hz)
    stop = (ratio * ratio) ** FILTER_ORDER  # ratio^(2 order); numpy squares fast
    rejected = stop / (1.0 + stop)  # 1 - G without the cancellation of 1 - 1 / (1 + ...), [n_cutoffs, n_freq]
    out[:, whole] = np.sqrt(((weight * rejected * rejected) @ power) / n ** 2)
    return out


def _analysis_window(x2: np.ndarray) -> np.ndarray:
    """Frames and columns for residual analysis: every frame if some columns have no gap; otherwise the longest
    stretch of frames in which at least half the columns are present, keeping the columns complete over it."""
    finite = np.isfinite(x2)
    if finite.all(axis=0).any() or not finite.any():
        return x2
    _, starts, stops = runs((finite.mean(axis=1) >= 0.5)[:, None])
    if not len(starts):
        return x2[:0]
    k = int(np.argmax(stops - starts))
    return x2[starts[k]:stops[k]]


def residual_cutoff(
    x: np.ndarray,
    rate_hz: float,
    fc_range: tuple[float, float] | None = None,
    step_hz: float = 0.5,
    fit_from_hz: float | None = None,
) -> float:
    """Cutoff by Winter's residual analysis (Winter 2009, sec. 3.4.4.3), one value for all columns of ``x``.

    For every column: residual R(fc) over ``fc_range`` (default 2 Hz to a quarter of the capture rate), a straight
    line fitted to the high-frequency part (default: the upper half of the range, from ``fit_from_hz``), its
    intercept at 0 Hz taken as the noise level, and the cutoff where R first falls to that level (linear
    interpolation between grid points). The trial's cutoff is the median over columns, so a few markers with odd
    content cannot drag it. Columns with NaN or no variation are ignored (if every column has a gap, the longest
    stretch of frames where most are present is used); if nothing usable remains, the lower bound is returned.
    """
    lo, hi = fc_range if fc_range is not None else (2.0, 0.25 * rate_hz)
    hi = min(hi, 0.49 * rate_hz)
    if not 0 < lo < hi:
        raise ConfigError(f"residual analysis range {lo:g}-{hi:g} Hz is empty at {rate_hz:g} Hz")
    cutoffs = np.arange(lo, hi + 1e-9, step_hz)
    x2 = _analysis_window(np.asarray(x, dtype=float).reshape(len(x), -1))
    with np.errstate(invalid="ignore"):
        spread = np.ptp(x2, axis=0)  # NaN or infinite for columns with NaN or infinite values
    usable = np.isfinite(spread) & (spread > 0)
    if not usable.any() or x2.shape[0] < 8:
        return float(lo)
    res = residuals(x2[:, usable], rate_hz, cutoffs)  # [K, C]
    fit_from = fit_from_hz if fit_from_hz is not None else 0.5 * (lo + hi)
    in_fit = cutoffs >= fit_from
    if in_fit.sum() < 2:
        raise ConfigError("residual analysis needs at least two cutoffs in the fitted high-frequency range")
    _, intercept = np.polyfit(cutoffs[in_fit], res[in_fit], 1)  # per column
    below = res <= intercept[None, :]
    has = below.any(axis=0)
    first = np.argmax(below, axis=0)
    chosen = np.full(res.shape[1], hi)
    cols = np.nonzero(has)[0]
    k = first[cols]
    chosen[cols] = cutoffs[k]
    interp = cols[k > 0]
    if interp.size:
        k1 = first[interp]
        r0, r1 = res[k1 - 1, interp], res[k1, interp]
        frac = (r0 - intercept[interp]) / np.where(r0 > r1, r0 - r1, 1.0)
        chosen[interp] = cutoffs[k1 - 1] + np.clip(frac, 0.0, 1.0) * step_hz
    return float(np.median(chosen))


# --------------------------------------------------------------------------- landmarks
@dataclass(frozen=True)
class FilterInfo:
    """What smoothing did to a trial, recorded with its outputs."""

    cutoff_hz: float
    method: str  # "residual" (Winter's residual analysis) or "fixed"
    gaps_filled: int  # number of marker gaps bridged by the spline
    long_gaps: tuple[str, ...]  # human-readable notes for gaps left missing
    max_gap_frames: int = DEFAULT_MAX_GAP_FRAMES


def _stack(lm: Landmarks) -> tuple[np.ndarray, list[tuple[str, str, int, int]]]:
    """All points and cluster markers of a trial as one [F, M, 3] array with an index of where each came from."""
    blocks, index, m = [], [], 0
    for name, p in lm.points.items():
        blocks.append(np.asarray(p, dtype=float)[:, None, :])
        index.append(("point", name, m, m + 1))
        m += 1
    for name, c in lm.clusters.items():
        c = np.asarray(c, dtype=float)
        blocks.append(c)
        index.append(("cluster", name, m, m + c.shape[1]))
        m += c.shape[1]
    n_frames = blocks[0].shape[0] if blocks else 0
    return (np.concatenate(blocks, axis=1) if blocks else np.zeros((n_frames, 0, 3))), index


def _describe(gaps: tuple[Gap, ...], index, rate_hz: float, max_gap_frames: int) -> tuple[str, ...]:
    seen, notes = set(), []
    for g in gaps:
        marker = g.column // 3
        key = (marker, g.start, g.n_frames)
        if key in seen:
            continue
        seen.add(key)
        kind, name, m0, m1 = next(entry for entry in index if entry[2] <= marker < entry[3])
        label = name if kind == "point" else f"{name} marker {marker - m0 + 1}"
        why = EDGE_GAP_NOTE if g.at_edge else f"longer than {max_gap_frames} frames"
        notes.append(
            f"{label}: frames {g.start}-{g.start + g.n_frames - 1} ({g.n_frames} frames, "
            f"{g.n_frames / rate_hz:.3f} s) left missing, {why}"
        )
    return tuple(notes)


def smooth_landmarks(
    lm: Landmarks, cutoff_hz: float | None = None, max_gap_frames: int = DEFAULT_MAX_GAP_FRAMES, *,
    keep_clusters: bool = True,
) -> tuple[Landmarks, FilterInfo]:
    """Fill short gaps, then low-pass every point and cluster marker of a trial with one cutoff.

    ``cutoff_hz=None`` chooses it by Winter's residual analysis over all marker coordinates (median of the
    per-coordinate cutoffs, see ``residual_cutoff``); the same cutoff is applied to every marker.
    ``keep_clusters=False`` leaves the cluster markers out of the result (they still count in the residual
    analysis): they serve only to rebuild landmarks from a static trial, which comes before smoothing, so a sprint
    trial's clusters need not be filtered.
    """
    stacked, index = _stack(lm)
    filled, report = fill_gaps(stacked, max_gap_frames)
    if cutoff_hz is None:
        cutoff, method = residual_cutoff(filled, lm.rate_hz), "residual"
    else:
        _check_cutoff(lm.rate_hz, float(cutoff_hz))
        cutoff, method = float(cutoff_hz), "fixed"
    kept = index if keep_clusters else [entry for entry in index if entry[0] == "point"]  # points come first
    to_filter = filled[:, :sum(m1 - m0 for _, _, m0, m1 in kept)]
    smooth = lowpass(to_filter, lm.rate_hz, cutoff, axis=0) if to_filter.shape[1] else to_filter
    points, clusters = {}, {}
    for kind, name, m0, m1 in kept:
        if kind == "point":
            points[name] = smooth[:, m0]
        else:
            clusters[name] = smooth[:, m0:m1]
    n_filled = len({(g.column // 3, g.start) for g in report.filled})
    info = FilterInfo(
        cutoff_hz=cutoff,
        method=method,
        gaps_filled=n_filled,
        long_gaps=_describe(report.unfilled, index, lm.rate_hz, max_gap_frames),
        max_gap_frames=max_gap_frames,
    )
    return lm.replace(points=points, clusters=clusters), info
