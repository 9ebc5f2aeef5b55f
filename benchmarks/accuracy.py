"""Print the kinematic accuracy of the pipeline on generated sprint trials with known truth, per condition.

Usage: python benchmarks/accuracy.py
Event errors in frames (at the trial's own rate and scaled to 250 Hz) and hip/knee flexion RMS errors in degrees.
"""
from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np

from hamstride.pipeline import trial_kinematics
from hamstride.synth import SprintSpec, write_sprint_trial

CONDITIONS = {
    "overground 250 Hz Z-up mm": SprintSpec(speed_m_s=8.5, rate_hz=250.0, seed=1),
    "overground 500 Hz Y-up m, -x": SprintSpec(speed_m_s=9.3, rate_hz=500.0, vertical_axis="y", units="m",
                                               travel_sign=-1, seed=2),
    "treadmill 250 Hz Z-up mm": SprintSpec(speed_m_s=7.5, rate_hz=250.0, treadmill=True, seed=3),
    "treadmill 500 Hz Y-up cm, -x": SprintSpec(speed_m_s=8.0, rate_hz=500.0, treadmill=True, vertical_axis="y",
                                               units="cm", travel_sign=-1, seed=4),
    "overground 250 Hz 7 m/s, -x": SprintSpec(speed_m_s=7.0, rate_hz=250.0, travel_sign=-1, seed=5),
    "overground 250 Hz 9.5 m/s": SprintSpec(speed_m_s=9.5, rate_hz=250.0, seed=6),
}


def nearest_errors(found, expected):
    found = np.asarray(found)
    return np.array([np.min(np.abs(found - t)) if found.size else np.inf for t in expected])


def main() -> None:
    print(f"{'condition':32s} {'FS med/max (fr@250)':>20s} {'TO med/max (fr@250)':>20s} {'hip RMS deg':>12s} "
          f"{'knee RMS deg':>13s} {'strides found/true':>19s}")
    with tempfile.TemporaryDirectory() as tmp:
        for name, spec in CONDITIONS.items():
            path = Path(tmp) / "trial.c3d"
            truth = write_sprint_trial(path, spec)
            kin = trial_kinematics(path)
            duration = kin.trial.n_frames / spec.rate_hz
            fs, to, hip, knee, found, true = [], [], [], [], 0, 0
            for side in ("left", "right"):
                inside = lambda t: t[(t > 0.05) & (t < duration - 0.05)]
                fs.extend(nearest_errors(kin.events.foot_strikes_s[side], inside(truth.foot_strikes_s[side])) * 250)
                to.extend(nearest_errors(kin.events.toe_offs_s[side], inside(truth.toe_offs_s[side])) * 250)
                true += len(truth.foot_strikes_s[side]) - 1
                for s in kin.valid_strides:
                    if s.side != side:
                        continue
                    found += 1
                    w = slice(s.start_frame, s.end_frame + 1)
                    for joint, store in (("hip_flexion", hip), ("knee_flexion", knee)):
                        err = np.degrees(kin.angles[side][joint][w] - truth.angles[side][joint][w])
                        store.append(np.sqrt(np.nanmean(err ** 2)))
            print(f"{name:32s} {np.median(fs):9.2f} / {np.max(fs):5.2f}    {np.median(to):9.2f} / {np.max(to):5.2f}   "
                  f"{np.max(hip):10.2f}   {np.max(knee):11.2f}   {found:8d} / {true:d}")
    print("(RMS columns show the worst stride; bounds: events median <= 1, max <= 3 frames at 250 Hz; angles <= 2 deg)")


if __name__ == "__main__":
    main()
