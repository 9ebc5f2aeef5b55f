"""Per-side summaries, symmetry and flags (metrics stage)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from hamstride.metrics import FlagConfig, compute_flags, limb_symmetry_index, summarise, symmetry_index


def test_symmetry_index_formula():
    # Robinson et al. 1987 (from memory): SI = (R - L) / (0.5 (R + L)) x 100
    assert symmetry_index(110.0, 90.0) == pytest.approx(20.0)
    assert symmetry_index(9.0, 9.0) == 0.0
    assert np.isnan(symmetry_index(0.0, 0.0))
    assert np.isnan(symmetry_index(-3.0, -4.0))  # negative strains (short head shortening): no meaningful ratio
    assert np.isnan(limb_symmetry_index(-5.8, -4.0))
    # LSI = involved / uninvolved x 100; 90 % is the usual line (MSSE 2019;51:1091)
    assert limb_symmetry_index(8.1, 9.0) == pytest.approx(90.0)


def _strides(right_mean, left_mean, sd, n=8, seed=0, athlete="ZZ01", session="2026-01-05_a", muscles=("biceps_femoris_long", "semitendinosus", "semimembranosus")):
    rng = np.random.default_rng(seed)
    rows = []
    for side, mean in (("right", right_mean), ("left", left_mean)):
        for k in range(n):
            for m in muscles:
                strain = mean + rng.normal(0, sd)
                rows.append(dict(athlete=athlete, session=session, trial="t1" if k < n // 2 else "t2", side=side,
                                 stride=k + 1, muscle=m, speed_m_s=8.5 + rng.normal(0, 0.05), peak_strain_pct=strain,
                                 peak_fibre_length_lopt=1.0 + strain / 50.0,
                                 peak_lengthening_velocity_lopt_per_s=5.0 + rng.normal(0, 0.2),
                                 negative_work_j=20.0 * strain / 9.0 + rng.normal(0, 0.5),
                                 peak_force_n=1500 + rng.normal(0, 50)))
    return pd.DataFrame(rows)


def test_symmetric_athlete_with_stride_noise_gets_no_asymmetry_flag():
    # Ordinary stride-to-stride variation (SD 0.5 %-points around 9 % strain) on both legs: no flag.
    for seed in range(20):
        strides = _strides(9.0, 9.0, 0.5, seed=seed)
        athletes = pd.DataFrame([dict(athlete="ZZ01", involved_side="none")])
        flags = compute_flags(summarise(strides, athletes), athletes)
        assert not (flags["flag"] == "side_asymmetry").any(), flags


def test_real_asymmetry_and_guarding_are_flagged():
    strides = _strides(6.5, 9.0, 0.4)  # right side stretches ~28 % less
    athletes = pd.DataFrame([dict(athlete="ZZ01", involved_side="right")])
    summary = summarise(strides, athletes)
    flags = compute_flags(summary, athletes)
    asym = flags[flags["flag"] == "side_asymmetry"]
    guard = flags[flags["flag"] == "involved_side_guarding"]
    assert set(asym["side"]) == {"right"} and len(guard) == 3
    assert (guard["value"] < 90).all() and (guard["threshold"] == 90).all()
    assert all("involved (right)" in m for m in guard["message"])
    lsi = summary.loc[summary["side"] == "right", "peak_strain_lsi_pct"].iloc[0]
    assert lsi == pytest.approx(100 * 6.5 / 9.0, abs=5)


def test_large_relative_difference_within_noise_is_not_flagged():
    # A 12 % mean difference (9.5 vs 8.4 %) with very noisy strides (SD 3 %-points, 3 strides each) is within
    # stride-to-stride noise: difference 1.1 < 2 standard errors (2 x 2.45).
    strides = _strides(0.0, 0.0, 0.0, n=3)
    offsets = np.array([-3.0, 0.0, 3.0])
    for side, mean in (("right", 9.5), ("left", 8.4)):
        for m in ("biceps_femoris_long", "semitendinosus", "semimembranosus"):
            sel = (strides["side"] == side) & (strides["muscle"] == m)
            strides.loc[sel, "peak_strain_pct"] = mean + offsets
            strides.loc[sel, "negative_work_j"] = 20.0
    flags = compute_flags(summarise(strides), None, FlagConfig(min_strides=1))
    assert not (flags["flag"] == "side_asymmetry").any()
    # A 15 % difference (9.8 vs 8.4 %) with tight strides is real and beyond the 10 % line: flagged.
    for side, mean in (("right", 9.8), ("left", 8.4)):
        strides.loc[strides["side"] == side, "peak_strain_pct"] = mean + offsets[np.arange(len(strides[strides["side"] == side])) % 3] * 0.05
    flags = compute_flags(summarise(strides), None, FlagConfig(min_strides=1))
    assert (flags["flag"] == "side_asymmetry").sum() == 3


def test_few_strides_and_speed_low():
    a = _strides(9.0, 9.0, 0.3, n=2, session="2026-01-05_a")
    b = _strides(9.0, 9.0, 0.3, n=6, session="2026-01-19_b")
    b["speed_m_s"] = 9.6
    flags = compute_flags(summarise(pd.concat([a, b])), None)
    few = flags[flags["flag"] == "few_strides"]
    assert set(few["session"]) == {"2026-01-05_a"} and set(few["side"]) == {"left", "right"}
    slow = flags[flags["flag"] == "speed_low"]
    assert list(slow["session"]) == ["2026-01-05_a"]


def test_high_stretch_against_squad_distribution_and_fixed_limit():
    frames = [_strides(9.0 + 0.1 * i, 9.0 + 0.1 * i, 0.2, athlete=f"ZZ{i:02d}", seed=i) for i in range(6)]
    frames.append(_strides(16.0, 16.0, 0.2, athlete="ZZ99", seed=99))
    summary = summarise(pd.concat(frames))
    flags = compute_flags(summary, None)
    high = flags[flags["flag"] == "high_stretch"]
    assert set(high["athlete"]) == {"ZZ99"}
    assert all("squad mean" in m for m in high["message"])
    fixed = compute_flags(summary, None, FlagConfig(high_stretch_limit_lopt=1.1))
    assert "configured limit" in fixed[fixed["flag"] == "high_stretch"]["message"].iloc[0]


def test_work_asymmetry_message_says_when_forces_are_capacity_limited():
    strides = _strides(6.5, 9.0, 0.4)
    strides["late_swing_moments_met_pct"] = 30.0
    flags = compute_flags(summarise(strides), None)
    work = flags[(flags["flag"] == "side_asymmetry") & flags["message"].str.contains("negative")]
    stretch = flags[(flags["flag"] == "side_asymmetry") & flags["message"].str.contains("strain")]
    assert len(work) == 3 and all("only 30% of late-swing" in m for m in work["message"])
    assert len(stretch) == 3 and not any("late-swing frames" in m for m in stretch["message"])
    strides["late_swing_moments_met_pct"] = 90.0
    flags = compute_flags(summarise(strides), None)
    assert not flags["message"].str.contains("late-swing frames").any()


def test_window_peaks_equal_peak_in_window_for_every_window_and_column():
    from hamstride.metrics import peak_in_window, window_peaks

    rng = np.random.default_rng(0)
    x = rng.normal(size=(300, 4))
    x[50:80, 1] = np.nan  # a gap inside one column's window
    x[100:140] = np.nan  # a window with nothing finite
    x[210, 3] = x[205, 3] = 9.0  # a tie: the first frame wins, as with nanargmax
    starts, stops = np.array([0, 40, 95, 100, 200, 250, 299]), np.array([30, 90, 145, 139, 299, 260, 299])
    peaks, index = window_peaks(x, starts, stops)
    assert peaks.shape == index.shape == (7, 4)
    for w, (a, b) in enumerate(zip(starts, stops)):
        for c in range(4):
            value, at = peak_in_window(x[:, c], a, b)
            assert at == index[w, c]
            assert (np.isnan(value) and np.isnan(peaks[w, c])) or value == peaks[w, c]
    assert index[4, 3] == 205
    one, at_one = window_peaks(x[:, 0], starts[:2], stops[:2])  # 1-D values give 1-D results
    none, at_none = window_peaks(x, [10, 20], [9, 19])  # only empty windows
    assert np.isnan(none).all() and (at_none == -1).all() and none.shape == (2, 4)
    assert one.shape == at_one.shape == (2,)
