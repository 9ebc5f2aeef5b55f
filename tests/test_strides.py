"""Stride cutting and time normalisation."""
from __future__ import annotations

import numpy as np
import pytest

from hamstride.events import GaitEvents
from hamstride.strides import Stride, cut_strides, normalise, normalise_strides

RATE = 250.0


def _events(fs_right, to_right, fs_left=(), to_left=()):
    return GaitEvents(
        foot_strikes_s={"right": np.asarray(fs_right, float), "left": np.asarray(fs_left, float)},
        toe_offs_s={"right": np.asarray(to_right, float), "left": np.asarray(to_left, float)},
        method="markers",
    )


def test_complete_strides_only_and_fields():
    # right: strikes at 0.100, 0.543, 0.987; toe-offs at 0.05 (partial contact at the start), 0.201, 0.645
    events = _events([0.100, 0.543, 0.987], [0.05, 0.201, 0.645], [0.321, 0.765], [0.422, 0.866])
    strides = cut_strides(events, RATE, n_frames=300, knee_flexion=None)
    right = [s for s in strides if s.side == "right"]
    left = [s for s in strides if s.side == "left"]
    assert len(right) == 2 and len(left) == 1  # incomplete strides at both ends dropped
    s = right[0]
    assert s.foot_strike_s == pytest.approx(0.100) and s.next_foot_strike_s == pytest.approx(0.543)
    assert s.toe_off_s == pytest.approx(0.201)
    assert s.stride_time_s == pytest.approx(0.443)
    assert s.contact_time_s == pytest.approx(0.101)
    assert s.toe_off_pct == pytest.approx(100 * 0.101 / 0.443)
    assert s.start_frame == 25 and s.end_frame == 135  # ceil(0.1*250) = 25, floor(0.543*250) = 135
    assert s.valid and s.reason == ""
    assert np.isnan(s.late_swing_start_pct)


def test_late_swing_start_at_swing_peak_knee_flexion():
    t = np.arange(300) / RATE
    # knee flexion with a stance peak (smaller) and a swing peak at exactly 0.400 s (between toe-off and next strike)
    knee = 0.6 * np.exp(-((t - 0.15) / 0.03) ** 2) + 2.2 * np.exp(-((t - 0.400) / 0.06) ** 2)
    events = _events([0.100, 0.543], [0.201])
    (s,) = cut_strides(events, RATE, 300, {"right": knee, "left": knee})
    expected = 100 * (0.400 - 0.100) / 0.443
    assert s.late_swing_start_pct == pytest.approx(expected, abs=100 * 0.1 / RATE / 0.443)  # 0.1 frame


def test_implausible_strides_rejected_with_reason():
    # 2nd stride of 1.1 s (a missed foot strike) and a 3rd with a 0.45 s contact; default limits 0.3-1.0 s and
    # 0.06-0.4 s (issue 3's sprint limits widened for jogging in issue 13: a 3 m/s jog has 0.7-0.8 s strides and
    # 0.25-0.30 s contacts)
    events = _events([0.10, 0.54, 1.64, 2.30], [0.20, 0.64, 2.09])
    strides = cut_strides(events, RATE, n_frames=600, knee_flexion=None)
    assert [s.valid for s in strides] == [True, False, False]
    assert "stride time 1.100 s" in strides[1].reason and "missed" in strides[1].reason
    assert "contact time 0.450 s" in strides[2].reason
    # stricter custom range rejects the first as well
    strict = cut_strides(events, RATE, 600, None, contact_range=(0.06, 0.09))
    assert not strict[0].valid and "contact time 0.100 s" in strict[0].reason


def test_stride_without_toe_off_is_invalid():
    events = _events([0.10, 0.54], [])
    (s,) = cut_strides(events, RATE, 300, None)
    assert not s.valid and "no toe-off" in s.reason


def _stride(t0, t1):
    return Stride("right", 0, t0, np.nan, t1, 0, 0, t1 - t0, np.nan, np.nan, np.nan, True, "")


def test_normalise_endpoints_and_shape():
    t = np.arange(400) / RATE
    # smooth multi-column signal [F, 2, 3]
    sig = np.stack([np.sin(2 * np.pi * 2.3 * t + k) for k in range(6)], axis=1).reshape(400, 2, 3)
    stride = _stride(0.1013, 0.5447)  # fractional event times
    out = normalise(sig, stride, RATE)
    assert out.shape == (101, 2, 3)
    truth = np.stack([np.sin(2 * np.pi * 2.3 * np.array([0.1013, 0.5447]) + k) for k in range(6)], axis=1)
    # exact endpoint values of the analytic signal (cubic spline at 250 Hz of a 2.3 Hz sine: error << 1e-5)
    np.testing.assert_allclose(out[0].ravel(), truth[0], atol=1e-6)
    np.testing.assert_allclose(out[-1].ravel(), truth[1], atol=1e-6)
    mid = np.sin(2 * np.pi * 2.3 * (0.1013 + 0.5 * 0.4434) + np.arange(6))
    np.testing.assert_allclose(out[50].ravel(), mid, atol=1e-6)


def test_normalise_at_whole_frames_returns_samples_exactly():
    sig = np.random.default_rng(1).normal(size=(200, 4))
    out = normalise(sig, _stride(20 / RATE, 120 / RATE), RATE)
    np.testing.assert_allclose(out[0], sig[20], atol=1e-12)
    np.testing.assert_allclose(out[-1], sig[120], atol=1e-12)
    np.testing.assert_allclose(out[1], sig[21], atol=1e-12)  # 100 frames over 100 steps: every point a frame


def test_normalise_nan_column_falls_back_to_linear():
    sig = np.tile(np.arange(200, dtype=float)[:, None], (1, 2))
    sig[60, 1] = np.nan
    out = normalise(sig, _stride(20.5 / RATE, 120.5 / RATE), RATE)
    assert out[0, 0] == pytest.approx(20.5) and out[0, 1] == pytest.approx(20.5)
    assert out[-1, 1] == pytest.approx(120.5)
    assert np.isnan(out[:, 1]).any() and np.isfinite(out[:, 0]).all()


def test_normalise_strides_matches_the_analytic_signal_and_the_single_stride_version():
    t = np.arange(600) / RATE
    sig = np.stack([np.sin(2 * np.pi * 2.3 * t + k) for k in range(4)], axis=1)
    sig[:, 3][(t > 1.0) & (t < 1.1)] = np.nan  # a column with a gap: goes stride by stride
    strides = [_stride(0.1013, 0.5447), _stride(0.5447, 0.9911), _stride(1.2, 1.61)]
    out = normalise_strides(sig, strides, RATE)
    assert out.shape == (3, 101, 4)
    for k, stride in enumerate(strides):
        times = np.linspace(stride.foot_strike_s, stride.next_foot_strike_s, 101)
        truth = np.sin(2 * np.pi * 2.3 * times[:, None] + np.arange(3))
        np.testing.assert_allclose(out[k, :, :3], truth, atol=1e-6)  # cubic spline of a 2.3 Hz sine at 250 Hz
        # one spline through the whole trial or one per stride: the same interpolant to well below 1e-6
        np.testing.assert_allclose(out[k, :, :3], normalise(sig[:, :3], stride, RATE), atol=1e-7)
        np.testing.assert_array_equal(out[k, :, 3], normalise(sig[:, 3:], stride, RATE)[:, 0])
    at_frames = normalise_strides(sig, [_stride(20 / RATE, 120 / RATE)], RATE)[0]
    np.testing.assert_allclose(at_frames[::1, :3], sig[20:121, :3], atol=1e-12)  # through every sample
    with pytest.raises(ValueError):
        normalise_strides(sig, [_stride(2.3, 2.5)], RATE)
    assert normalise_strides(sig, [], RATE).shape == (0, 101, 4)


def test_late_swing_start_and_toe_off_pct_on_a_generated_sprint():
    """Truth by construction (hamstride.synth): the same sprint generated at 250 Hz and at 5 kHz (same seed, same
    gait); the 5 kHz knee curve gives the swing-phase peak knee flexion to 0.2 ms."""
    from hamstride.synth import SprintSpec, simulate_sprint

    _, _, coarse = simulate_sprint(SprintSpec(rate_hz=RATE, duration_s=1.4, seed=4, noise_mm=0.0, n_gaps=0))
    _, _, fine = simulate_sprint(SprintSpec(rate_hz=5000.0, duration_s=1.4, seed=4, noise_mm=0.0, n_gaps=0))
    sides = ("left", "right")
    events = GaitEvents({s: coarse.foot_strikes_s[s] for s in sides}, {s: coarse.toe_offs_s[s] for s in sides},
                        "markers")
    knee = {s: coarse.angles[s]["knee_flexion"] for s in sides}
    strides = cut_strides(events, RATE, coarse.time_s.size, knee)
    assert len(strides) == sum(coarse.foot_strikes_s[s].size - 1 for s in sides)
    for st in strides:
        assert st.valid
        in_swing = (fine.time_s > st.toe_off_s) & (fine.time_s < st.next_foot_strike_s)
        t_peak = fine.time_s[in_swing][np.argmax(fine.angles[st.side]["knee_flexion"][in_swing])]
        expected = 100 * (t_peak - st.foot_strike_s) / st.stride_time_s
        assert st.late_swing_start_pct == pytest.approx(expected, abs=0.1)  # 0.1 % of a stride = 0.45 ms
        # stance about 22 % of the stride in sprinting (Mann & Hagy 1980); the generator is built on it
        assert 18 < st.toe_off_pct < 26
