"""Gap filling, zero-lag Butterworth with the dual-pass correction, Winter's residual analysis."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import freqz, savgol_filter

from hamstride.errors import ConfigError
from hamstride.landmarks import Landmarks
from hamstride.signal import (
    FilterInfo,
    _coefficients,
    design_cutoff_hz,
    dual_pass_correction,
    fill_gaps,
    lowpass,
    residual_cutoff,
    savgol_derivative,
    smooth_landmarks,
)

RATE = 250.0


def test_dual_pass_correction_two_passes_is_0802():
    # Robertson & Dowling 2003: C = (2**(1/n) - 1)**(1/4), n = 2 gives 0.802.
    assert dual_pass_correction(2) == pytest.approx(0.8022, abs=5e-5)
    assert dual_pass_correction(1) == pytest.approx(1.0)  # one pass needs no correction (same formula)
    # Four passes (two filtfilt calls): (2**(1/4) - 1)**(1/4) = 0.6567 (same formula, evaluated by hand).
    assert dual_pass_correction(4) == pytest.approx((2 ** 0.25 - 1) ** 0.25)


@pytest.mark.parametrize("cutoff", [6.0, 12.0, 40.0])
def test_two_pass_gain_at_cutoff_is_minus_3_db(cutoff):
    # Definition of the cutoff: the cascade of two passes has |H|**2 = 1/sqrt(2) at fc (Robertson & Dowling 2003).
    b, a = _coefficients(RATE, cutoff)
    _, h = freqz(b, a, worN=[cutoff], fs=RATE)
    assert abs(h[0]) ** 2 == pytest.approx(1 / np.sqrt(2), rel=1e-6)
    # Without the correction the two-pass gain at fc would be 1/2 (-6 dB): check the correction is really applied.
    assert design_cutoff_hz(RATE, cutoff) > cutoff


def test_filtered_sine_measured_gain_at_cutoff_is_minus_3_db():
    # Same check in the time domain on a long sinusoid at the cutoff (gain 1/sqrt(2) within 2 %).
    t = np.arange(0, 20, 1 / RATE)
    x = np.sin(2 * np.pi * 10.0 * t)
    y = lowpass(x, RATE, 10.0)
    mid = slice(1000, -1000)
    assert np.std(y[mid]) / np.std(x[mid]) == pytest.approx(1 / np.sqrt(2), rel=0.02)


def test_zero_lag_and_unit_gain_well_below_cutoff():
    # A zero-phase (forward-backward) filter shifts nothing; 1 Hz at fc = 15 Hz is in the pass band.
    t = np.arange(0, 4, 1 / RATE)
    x = np.column_stack([np.sin(2 * np.pi * 1.0 * t), np.cos(2 * np.pi * 1.0 * t)])
    y = lowpass(x, RATE, 15.0)
    mid = slice(100, -100)
    assert np.max(np.abs(y[mid] - x[mid])) < 1e-4
    lag = np.argmax(np.correlate(y[mid, 0], x[mid, 0], mode="full")) - (len(x[mid]) - 1)
    assert lag == 0


def test_lowpass_vectorised_over_all_axes_and_any_axis():
    rng = np.random.default_rng(0)
    x = rng.normal(size=(300, 4, 3))
    y = lowpass(x, RATE, 12.0)
    one = lowpass(x[:, 2, 1], RATE, 12.0)
    assert np.allclose(y[:, 2, 1], one)
    yt = lowpass(np.moveaxis(x, 0, 2), RATE, 12.0, axis=2)
    assert np.allclose(np.moveaxis(yt, 2, 0), y)


def test_lowpass_keeps_nan_runs_and_filters_each_finite_stretch():
    t = np.arange(0, 2, 1 / RATE)
    x = np.column_stack([np.sin(2 * np.pi * t), np.sin(2 * np.pi * t)])
    x[200:260, 0] = np.nan
    y = lowpass(x, RATE, 15.0)
    assert np.isnan(y[200:260, 0]).all()
    assert np.isfinite(y[:200, 0]).all() and np.isfinite(y[260:, 0]).all()
    assert np.allclose(y[:200, 0], lowpass(x[:200, 0], RATE, 15.0))
    assert np.isfinite(y[:, 1]).all()


def test_cutoff_at_or_above_nyquist_is_a_config_error():
    with pytest.raises(ConfigError, match="cutoff"):
        lowpass(np.zeros(100), RATE, 125.0)


def test_fill_gaps_short_gap_accurate_long_and_edge_gaps_left_and_reported():
    t = np.arange(0, 2, 1 / RATE)
    truth = 0.3 * np.sin(2 * np.pi * 1.5 * t) + 0.1 * np.cos(2 * np.pi * 0.7 * t)
    x = np.column_stack([truth, truth, truth]).copy()
    x[100:110, 0] = np.nan  # 10 frames: filled (default limit 10 frames, common practice)
    x[200:230, 1] = np.nan  # 30 frames: too long
    x[:3, 2] = np.nan  # touches the start: never filled
    filled, report = fill_gaps(x, max_gap_frames=10)
    # A cubic spline through smooth 250 Hz samples is accurate far below a marker's noise (~0.5 mm; common
    # practice): < 0.05 mm here, and at least 10x better than straight-line interpolation across the gap.
    err = np.max(np.abs(filled[100:110, 0] - truth[100:110]))
    linear = np.interp(np.arange(100, 110), [99, 110], truth[[99, 110]])
    assert err < 5e-5
    assert err < 0.1 * np.max(np.abs(linear - truth[100:110]))
    assert np.isnan(filled[200:230, 1]).all()
    assert np.isnan(filled[:3, 2]).all()
    assert [(g.column, g.start, g.n_frames) for g in report.filled] == [(0, 100, 10)]
    assert [(g.column, g.start, g.n_frames, g.at_edge) for g in report.unfilled] == [(1, 200, 30, False),
                                                                                       (2, 0, 3, True)]
    # untouched samples unchanged
    ok = np.isfinite(x)
    assert np.array_equal(filled[ok], x[ok])


def test_fill_gaps_limit_is_inclusive_and_configurable():
    x = np.sin(np.linspace(0, 3, 200))[:, None].repeat(2, axis=1)
    x[50:61, 0] = np.nan  # 11 frames
    filled, report = fill_gaps(x, max_gap_frames=10)
    assert np.isnan(filled[50:61, 0]).all() and len(report.unfilled) == 1
    filled, report = fill_gaps(x, max_gap_frames=11)
    assert np.isfinite(filled).all() and len(report.filled) == 1


def _sines_plus_noise(rng, n_cols=20, noise_m=0.0005):
    # Synthetic marker-like signals: components at 1, 3 and 6 Hz (highest 6 Hz) + white noise at 250 Hz.
    t = np.arange(0, 3, 1 / RATE)
    cols = []
    for _ in range(n_cols):
        ph = rng.uniform(0, 2 * np.pi, 3)
        s = (0.05 * np.sin(2 * np.pi * 1 * t + ph[0]) + 0.02 * np.sin(2 * np.pi * 3 * t + ph[1])
             + 0.01 * np.sin(2 * np.pi * 6 * t + ph[2]))
        cols.append(s + rng.normal(0, noise_m, t.size))
    return np.column_stack(cols)


@pytest.mark.parametrize("noise_m", [0.0005, 0.001, 0.002])
def test_residual_analysis_cutoff_between_highest_component_and_2_5_times_it(noise_m):
    # Issue 3 acceptance: Winter's residual analysis picks a cutoff between the signal's highest component (6 Hz)
    # and 2.5x it (15 Hz).
    x = _sines_plus_noise(np.random.default_rng(7), noise_m=noise_m)
    fc = residual_cutoff(x, RATE)
    assert 6.0 <= fc <= 15.0


def test_residual_cutoff_falls_as_noise_rises():
    # Winter 2009 sec. 3.4.4.3: more noise raises the noise level, so the residual meets it at a lower cutoff.
    rng = np.random.default_rng(8)
    quiet = residual_cutoff(_sines_plus_noise(rng, noise_m=0.0002), RATE)
    loud = residual_cutoff(_sines_plus_noise(rng, noise_m=0.004), RATE)
    assert loud < quiet


def _landmarks(x):
    return Landmarks(trial="t", rate_hz=RATE,
                     points={"right_heel": x[:, 0:3], "left_heel": x[:, 3:6]},
                     clusters={"right_thigh_cluster": x[:, 6:15].reshape(-1, 3, 3)})


def test_smooth_landmarks_one_cutoff_for_all_markers_and_records_it():
    rng = np.random.default_rng(9)
    x = _sines_plus_noise(rng, n_cols=15)
    x[100:105, 0:3] = np.nan  # short gap: filled
    x[300:400, 3:6] = np.nan  # 100 frames: left missing and reported
    lm = _landmarks(x)
    out, info = smooth_landmarks(lm)
    assert isinstance(info, FilterInfo) and info.method == "residual" and 6.0 <= info.cutoff_hz <= 15.0
    assert info.gaps_filled == 1
    assert len(info.long_gaps) == 1 and "left_heel" in info.long_gaps[0] and "300-399" in info.long_gaps[0]
    assert np.isfinite(out.points["right_heel"]).all()
    assert np.isnan(out.points["left_heel"][300:400]).all()
    # every marker got the same filter: compare with lowpass at the recorded cutoff
    assert np.allclose(out.clusters["right_thigh_cluster"], lowpass(lm.clusters["right_thigh_cluster"], RATE,
                                                                     info.cutoff_hz))
    fixed, info_fixed = smooth_landmarks(lm, cutoff_hz=12.0)
    assert info_fixed.method == "fixed" and info_fixed.cutoff_hz == 12.0
    assert np.allclose(fixed.points["right_heel"], lowpass(fill_gaps(lm.points["right_heel"])[0], RATE, 12.0))


def test_residual_analysis_still_works_when_every_marker_has_a_gap():
    # Athletes run into the capture volume: every coordinate may miss its first frames. Same acceptance band.
    x = _sines_plus_noise(np.random.default_rng(10), noise_m=0.001)
    for c in range(x.shape[1]):
        x[: 5 + c, c] = np.nan
    assert 6.0 <= residual_cutoff(x, RATE) <= 15.0


def test_running_ramp_is_not_bent_at_the_trial_ends():
    # The forward coordinate of a sprinter is close to a ramp (10 m/s here); a linear signal has no high-frequency
    # content, so the filter must return it unchanged, ends included (< 0.01 mm; common practice: odd extension).
    x = np.arange(600) * 10.0 / RATE
    for cutoff in (4.0, 8.0, 20.0):
        assert np.max(np.abs(lowpass(x, RATE, cutoff) - x)) < 1e-5


@pytest.mark.parametrize("window,poly,order", [(5, 3, 1), (7, 3, 2), (7, 4, 3), (15, 3, 1), (3, 2, 1)])
def test_savgol_derivative_matches_scipy_including_the_fitted_edges(window, poly, order):
    # Reference: scipy.signal.savgol_filter(mode="interp") (Savitzky & Golay 1964 kernels, polynomial-fit edges).
    rng = np.random.default_rng(window + order)
    x = np.cumsum(rng.normal(size=(3, 400)), axis=1)
    ours = savgol_derivative(x, window, poly, order, 250.0)
    ref = savgol_filter(x, window, poly, deriv=order, delta=1 / 250.0, mode="interp")
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12 * np.abs(ref).max())
    # exact on a polynomial of the filter's degree: d/dt of t^3 sampled at 250 Hz
    t = np.arange(60) / 250.0
    cubic = savgol_derivative(t ** 3, window, max(poly, 3), 1, 250.0) if window > 3 else None
    if cubic is not None:
        np.testing.assert_allclose(cubic, 3 * t ** 2, rtol=0, atol=1e-9)


def test_smoothing_without_clusters_keeps_the_points_and_the_cutoff():
    # keep_clusters=False filters the points only; the residual analysis still sees every marker, so the cutoff and
    # the filtered points are those of the full smoothing.
    from hamstride.signal import smooth_landmarks

    rng = np.random.default_rng(21)
    t = np.arange(400) / 250.0
    base = np.stack([np.sin(2 * np.pi * 2.0 * t), np.cos(2 * np.pi * 1.5 * t), 0.1 * t], axis=1)
    points = {f"p{k}": base * (k + 1) + rng.normal(0, 1e-3, base.shape) for k in range(4)}
    cluster = np.stack([base + k + rng.normal(0, 1e-3, base.shape) for k in range(3)], axis=1)
    cluster[100:104, 1] = np.nan  # a short gap, filled in both runs
    cluster[:5, 2] = np.nan  # an edge gap, reported in both runs
    lm = Landmarks(trial="t", rate_hz=250.0, points=points, clusters={"right_thigh_cluster": cluster})
    full, info_full = smooth_landmarks(lm)
    points_only, info = smooth_landmarks(lm, keep_clusters=False)
    assert info == info_full and not points_only.clusters
    for name in points:
        np.testing.assert_array_equal(points_only.points[name], full.points[name])
