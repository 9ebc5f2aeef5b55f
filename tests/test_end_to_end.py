"""Kinematics end to end on generated sprint trials with known truth (issue 3 acceptance).

Each trial is written to C3D (with 0.5 mm marker noise and short gaps), read back and run through io, landmarks,
signal, segments, angles, events and strides; results are compared with the generator's truth.
Acceptance bounds (issue 3, common practice for marker-based event detection; Handsaker et al. 2016 report
touchdown errors of about 3 ms): foot-strike and toe-off median absolute error <= 1 frame and max <= 3 frames at
250 Hz; hip and knee flexion RMS error <= 2 deg over every stride; stride count exact.
"""
from __future__ import annotations

import numpy as np
import pytest

from hamstride.events import is_treadmill, running_speed
from hamstride.pipeline import trial_kinematics
from hamstride.synth import SprintSpec, write_sprint_trial

CONDITIONS = {
    "overground_250_zup_mm": SprintSpec(speed_m_s=8.5, rate_hz=250.0, seed=1),
    "overground_500_yup_m_reverse": SprintSpec(speed_m_s=9.3, rate_hz=500.0, vertical_axis="y", units="m",
                                               travel_sign=-1, seed=2),
    "treadmill_250_zup_mm": SprintSpec(speed_m_s=7.5, rate_hz=250.0, treadmill=True, seed=3),
    "treadmill_500_yup_cm_reverse": SprintSpec(speed_m_s=8.0, rate_hz=500.0, treadmill=True, vertical_axis="y",
                                               units="cm", travel_sign=-1, seed=4),
    "overground_250_slow_reverse": SprintSpec(speed_m_s=7.0, rate_hz=250.0, travel_sign=-1, seed=5),
}


def _run(tmp_path, name, spec):
    path = tmp_path / f"{name}.c3d"
    truth = write_sprint_trial(path, spec)
    kin = trial_kinematics(path)
    return truth, kin.trial, kin.landmarks, kin.angles, kin.events, kin.strides


def _event_errors_frames(found, expected, rate):
    """Frame errors of each expected event that lies inside the trial, matched to the nearest found event."""
    errors = []
    for t in expected:
        if len(found) == 0:
            errors.append(np.inf)
            continue
        errors.append(np.min(np.abs(np.asarray(found) - t)) * rate)
    return np.array(errors)


@pytest.mark.parametrize("name", list(CONDITIONS))
def test_events_angles_and_strides_match_truth(tmp_path, name):
    spec = CONDITIONS[name]
    truth, trial, lm, angles, events, strides = _run(tmp_path, name, spec)
    rate = spec.rate_hz
    scale = rate / 250.0  # bounds are stated in frames at 250 Hz
    duration = trial.n_frames / rate
    for side in ("left", "right"):
        # Events well inside the trial (the filter and the search windows need a few frames at each end).
        fs_true = truth.foot_strikes_s[side][(truth.foot_strikes_s[side] > 0.05) & (truth.foot_strikes_s[side] < duration - 0.05)]
        to_true = truth.toe_offs_s[side][(truth.toe_offs_s[side] > 0.05) & (truth.toe_offs_s[side] < duration - 0.05)]
        fs_err = _event_errors_frames(events.foot_strikes_s[side], fs_true, rate) / scale
        to_err = _event_errors_frames(events.toe_offs_s[side], to_true, rate) / scale
        assert np.median(fs_err) <= 1.0 and fs_err.max() <= 3.0, (side, fs_err)
        assert np.median(to_err) <= 1.0 and to_err.max() <= 3.0, (side, to_err)
        # Stride count exact: every complete truth stride (foot strike to next foot strike) is found and valid.
        true_fs = truth.foot_strikes_s[side]
        n_true = len(true_fs) - 1
        n_found = sum(1 for s in strides if s.side == side and s.valid)
        assert n_found == n_true, (side, n_found, n_true, [s.reason for s in strides if not s.valid])
        # Hip and knee flexion within 2 deg RMS over every stride.
        for s in (s for s in strides if s.side == side and s.valid):
            window = slice(s.start_frame, s.end_frame + 1)
            for joint in ("hip_flexion", "knee_flexion"):
                err = np.degrees(angles[side][joint][window] - truth.angles[side][joint][window])
                rms = float(np.sqrt(np.nanmean(err ** 2)))
                assert rms <= 2.0, (side, joint, rms)
    treadmill = is_treadmill(lm)
    assert treadmill == spec.treadmill
    assert running_speed(lm, events, treadmill) == pytest.approx(spec.speed_m_s, rel=0.05)


def test_analyse_trial_takes_a_trial_in_memory(tmp_path):
    # a notebook user reads a trial, edits it, and analyses the edited trial without writing a file
    from dataclasses import replace

    from hamstride.c3d import read_c3d
    from hamstride.errors import HamstrideError
    from hamstride.pipeline import AnalysisOptions, AthleteInfo, analyse_trial

    path = tmp_path / "memory.c3d"
    write_sprint_trial(path, SprintSpec(speed_m_s=8.5, seed=6))
    options = AnalysisOptions(monte_carlo_samples=0, force_band_samples=0)
    athlete = AthleteInfo(body_mass_kg=75.0)
    from_file = analyse_trial(path, options, athlete=athlete)
    trial = read_c3d(path)
    in_memory = analyse_trial(trial, options, athlete=athlete)
    assert from_file.strides.equals(in_memory.strides) and from_file.curves.equals(in_memory.curves)
    # the edit is what gets analysed: a lateral knee marker renamed is a landmark the map no longer finds
    knee = trial.labels.index("r.knee.lat")  # the generator's default labels
    edited = replace(trial, labels=trial.labels[:knee] + ("renamed",) + trial.labels[knee + 1:])
    with pytest.raises(HamstrideError) as error:
        analyse_trial(edited, options, athlete=athlete)
    assert error.value.code == "landmark_missing"
