"""Real-capture shapes, part A (issue 13): the lab frame from anatomy, full-body marker sets, subject-prefixed
labels, two subjects in one file, NUL-padded parameter strings, and a walking trial that must never look swapped.

Truth for angles is the generator's own segment rotations; its markers wobble on their segments (soft tissue, a few
mm) and the full-body sets add trunk, head and arm markers the pipeline never uses, so the checks do not rest on the
pipeline's own marker assumptions. The walking trial comes from a separate kinematic model written here (the sprint
generator cannot walk).
"""
from __future__ import annotations

import json

import numpy as np
import pytest

from hamstride.checks import check_sides
from hamstride.errors import HamstrideError, LandmarkError, PlausibilityError
from hamstride.io import read_c3d, write_c3d
from hamstride.labframe import detect_lab_frame, to_lab_frame
from hamstride.landmarks import REQUIRED_LANDMARKS, load_marker_map, resolve_landmarks
from hamstride.pipeline import AnalysisOptions, AthleteInfo, analyse_trial, trial_kinematics
from hamstride.synth import SprintSpec, lab_to_file, upper_body_markers, write_sprint_trial

FAST = AnalysisOptions(monte_carlo_samples=8)
ATHLETE = AthleteInfo(athlete="RC01", body_mass_kg=75.0, height_m=1.80)


def _rms_deg(got, want):
    ok = np.isfinite(got) & np.isfinite(want)
    return float(np.degrees(np.sqrt(np.mean((got[ok] - want[ok]) ** 2))))


@pytest.mark.parametrize("vertical,travel,clusters", [("z", 1, False), ("y", -1, True)])
def test_full_body_sprint_angles_within_2_deg_of_truth(tmp_path, vertical, travel, clusters):
    """Shape: full-body marker set (23 trunk, head and arm markers above the pelvis; without thigh/shank clusters
    most markers sit above the pelvis), soft-tissue wobble 3 mm, Z-up and Y-up."""
    path = tmp_path / "full_body.c3d"
    truth = write_sprint_trial(path, SprintSpec(seed=11, full_body=True, soft_tissue_mm=3.0, vertical_axis=vertical,
                                                travel_sign=travel, include_clusters=clusters))
    kin = trial_kinematics(path)
    assert kin.trial.lab.vertical_axis == f"+{vertical}"
    assert kin.trial.lab.travel_axis == ("+x" if travel > 0 else "-x") and kin.trial.lab.overground
    assert sum(label.startswith(("trunk.", "head.")) for label in kin.trial.labels) == 7  # markers above the pelvis
    for side in ("left", "right"):
        for angle in ("hip_flexion", "knee_flexion", "hip_adduction", "ankle_dorsiflexion"):
            rms = _rms_deg(kin.angles[side][angle], truth.angles[side][angle])
            assert rms < 2.0, (side, angle, rms)  # acceptance of issue 13: 2 deg RMS


def test_full_body_treadmill_and_static_find_forward_without_pelvis_travel(tmp_path):
    """Shape: full-body treadmill sprint (Y-up, -x) and a standing trial: forward from the stance foot (the belt
    carries it backward) and, standing, from the pelvis (PSIS -> ASIS)."""
    from hamstride.synth import simulate_static

    path = tmp_path / "treadmill.c3d"
    write_sprint_trial(path, SprintSpec(seed=4, treadmill=True, full_body=True, vertical_axis="y", travel_sign=-1))
    trial = read_c3d(path)
    lab = detect_lab_frame(resolve_landmarks(trial))
    assert (lab.vertical_axis, lab.travel_axis, lab.travel_from, lab.overground) == ("+y", "-x", "stance foot", False)
    labels, xyz, _ = simulate_static(vertical_axis="y", travel_sign=-1)
    static = read_c3d(write_c3d(tmp_path / "static.c3d", labels, xyz, 250.0))
    lab = detect_lab_frame(resolve_landmarks(static))
    assert (lab.vertical_axis, lab.travel_axis, lab.travel_from) == ("+y", "-x", "pelvis orientation")


def test_swapped_labels_in_a_full_body_set_are_still_caught(tmp_path):
    """Shape: full-body set with every left/right label swapped: left comes from up x forward, not from the labels,
    so the swap still shows."""
    from hamstride.synth import simulate_sprint

    labels, xyz, _ = simulate_sprint(SprintSpec(seed=2, full_body=True))
    swap = [("l" + lab[1:] if lab.startswith("r.") else "r" + lab[1:] if lab.startswith("l.") else lab)
            for lab in labels]
    path = write_c3d(tmp_path / "swapped.c3d", swap, xyz, 250.0)
    with pytest.raises(PlausibilityError) as info:
        analyse_trial(path, FAST, athlete=ATHLETE)
    assert info.value.code == "sides_swapped"


def test_prefixed_labels_analyse_with_the_default_labels(tmp_path):
    """Shape: subject-prefixed labels ('Ath07:r.asis') read with hamstride's default labels, no marker map."""
    path = tmp_path / "prefixed.c3d"
    write_sprint_trial(path, SprintSpec(seed=5, label_prefix="Ath07", duration_s=1.5))
    assert read_c3d(path).labels[0] == "Ath07:r.asis"
    result = analyse_trial(path, FAST, athlete=ATHLETE)
    assert result.info["n_strides"]["left"] >= 1 and result.info["n_strides"]["right"] >= 1


def test_squad_with_a_different_prefix_per_athlete(tmp_path):
    """Shape: prefixed labels in a squad, each athlete with their own prefix, one (default) marker map."""
    from hamstride.batch import run_squad

    root = tmp_path / "squad"
    for k, code in enumerate(("PX01", "PX02")):
        session = root / code / "2026-04-01_x"
        session.mkdir(parents=True)
        write_sprint_trial(session / "sprint_01.c3d", SprintSpec(seed=20 + k, label_prefix=f"Ath{k + 7:02d}",
                                                                 duration_s=1.5, athlete=code))
    # athlete folders must be listed in athletes.csv (issue 15: unlisted ones are skipped)
    (root / "athletes.csv").write_text("athlete,body_mass_kg,height_m,sex,involved_side,injury_date\n"
                                       "PX01,75,1.80,male,none,\nPX02,68,1.74,female,none,\n", encoding="utf-8")
    run = run_squad(root, tmp_path / "out", jobs=1, report=False)
    manifest = json.loads((run.out / "manifest.json").read_text())
    assert [r["status"] for r in manifest["inputs"]] == ["ok", "ok"], manifest["inputs"]


def test_two_subjects_in_one_file_ask_for_a_prefix(tmp_path):
    """Shape: one file holding two subjects' prefixed markers: a clear message, and a map naming the prefix works."""
    from hamstride.synth import simulate_sprint

    labels, xyz, _ = simulate_sprint(SprintSpec(seed=6, duration_s=1.5, include_clusters=False))
    second = xyz + np.array([0.0, 3000.0, 0.0])  # a second athlete 3 m to the side (mm)
    both = [f"Ath07:{lab}" for lab in labels] + [f"Ath09:{lab}" for lab in labels]
    path = write_c3d(tmp_path / "two.c3d", both, np.concatenate([xyz, second], axis=1), 250.0)
    with pytest.raises(LandmarkError) as info:
        analyse_trial(path, FAST, athlete=ATHLETE)
    message = info.value.message
    assert info.value.code == "several_subjects"
    assert "Ath07" in message and "Ath09" in message and 'prefix = "Ath07"' in message
    (tmp_path / "markers.toml").write_text('prefix = "Ath09"\n')
    result = analyse_trial(path, FAST, athlete=ATHLETE, markers=tmp_path / "markers.toml")
    assert result.info["n_strides"]["right"] >= 1
    explicit = "[landmarks]\n" + "".join(f'{k} = "Ath07:{v}"\n' for k, v in load_marker_map(None).landmarks.items())
    (tmp_path / "explicit.toml").write_text(explicit)
    assert analyse_trial(path, FAST, athlete=ATHLETE, markers=tmp_path / "explicit.toml").info["n_strides"]["left"]


def test_nul_padded_units_labels_events_and_subject_read(tmp_path):
    """Shape: NUL-padded labels and unit ('mm\\0\\0') from the generator, read and analysed. (NUL-padded event
    labels, contexts and subject names, which ezc3d's writer cannot pad, are in test_c3d_variants: nul_padded_strings.)"""
    path = tmp_path / "nul.c3d"
    truth = write_sprint_trial(path, SprintSpec(seed=8, nul_padding=2, include_events=True, athlete="NP01"))
    raw = path.read_bytes()
    assert b"mm\x00\x00" in raw and b"r.asis\x00\x00" in raw  # padded on disk
    trial = read_c3d(path)
    assert trial.units_in_file == "mm" and trial.labels[0] == "r.asis" and trial.meta["subject"] == "NP01"
    strikes = [e for e in trial.events if e.kind == "foot_strike" and e.side == "right"]
    assert [e.label for e in strikes][:1] == ["Foot Strike"]
    np.testing.assert_allclose([e.time_s for e in strikes], truth.foot_strikes_s["right"], atol=1e-6)
    result = analyse_trial(path, FAST, athlete=ATHLETE)
    assert result.info["n_strides"]["left"] >= 1 and result.info["n_strides"]["right"] >= 1


# ------------------------------------------------------------------------------------------------ walking
def _walking_full_body(duration_s=3.0, rate=200.0, speed=1.4, stride_s=1.1):
    """A kinematic walk (lab frame, m): pelvis at 0.95 m moving at ``speed``, each foot planted for 60 % of the
    stride (double support, no flight) and swung forward over 40 %, knees between hip and ankle, trunk, head and arm
    markers from synth.upper_body_markers. Landmarks under the default labels; not the sprint generator."""
    t = np.arange(int(duration_s * rate)) / rate
    n = len(t)
    length = speed * stride_s
    origin = np.stack([speed * t, np.zeros(n), 0.95 + 0.02 * np.sin(4 * np.pi * t / stride_s)], axis=-1)
    axes = np.repeat(np.array([[1.0, 0, 0], [0, 0, -1.0], [0, 1.0, 0]])[None], n, axis=0)  # X fwd, Y up, Z right
    markers = {}
    thigh_down = {}
    for side, sign, offset in (("right", -1.0, 0.0), ("left", 1.0, 0.5)):
        cycle = t / stride_s + offset
        u = cycle % 1.0
        swing = np.clip((u - 0.6) / 0.4, 0.0, 1.0)
        smooth = swing * swing * (3 - 2 * swing)
        foot_x = speed * t + length * (smooth - u) + 0.3 * length  # still in stance, forward by a stride in swing
        lift = 0.08 * np.sin(np.pi * swing)
        ankle = np.stack([foot_x, np.full(n, sign * 0.09), 0.08 + lift], axis=-1)
        hip = origin + np.array([-0.07, sign * 0.085, -0.08])
        knee = 0.5 * (hip + ankle) + np.array([0.06, 0.0, 0.0])
        thigh_down[side] = (knee - hip) / np.linalg.norm(knee - hip, axis=1, keepdims=True)
        s = side[0]
        markers.update({
            f"{s}.asis": origin + np.array([0.0, sign * 0.125, 0.0]),
            f"{s}.psis": origin + np.array([-0.16, sign * 0.045, 0.03]),
            f"{s}.knee.lat": knee + np.array([0.0, sign * 0.05, 0.0]),
            f"{s}.knee.med": knee - np.array([0.0, sign * 0.05, 0.0]),
            f"{s}.ankle.lat": ankle + np.array([0.0, sign * 0.035, 0.0]),
            f"{s}.ankle.med": ankle - np.array([0.0, sign * 0.035, 0.0]),
            f"{s}.heel": ankle + np.array([-0.05, 0.0, -0.05]),
            f"{s}.met1": ankle + np.array([0.14, -sign * 0.02, -0.06]),
            f"{s}.met5": ankle + np.array([0.12, sign * 0.03, -0.06]),
        })
    markers.update(upper_body_markers(origin, axes, thigh_down))
    labels = list(markers)
    return labels, np.stack([markers[k] for k in labels], axis=1)


@pytest.mark.parametrize("vertical,travel", [("z", 1), ("y", -1)])
def test_walking_full_body_is_never_called_swapped(tmp_path, vertical, travel):
    """Shape: a correctly labelled walking trial with a full-body set (no flight phase). The lab frame must come out
    right and the sides must not be called swapped (whatever else the pipeline says about a walk)."""
    labels, lab_xyz = _walking_full_body()
    above = [i for i, lab in enumerate(labels) if lab.startswith(("trunk.", "head.", "r.", "l."))
             and lab.split(".")[1] in ("shoulder", "upperarm", "elbow", "forearm", "wrist", "hand")
             or lab.startswith(("trunk.", "head."))]
    assert len(above) == 23 and (lab_xyz[:, above, 2] > lab_xyz[:, [labels.index("l.asis")], 2]).mean() > 0.9
    path = write_c3d(tmp_path / "walk.c3d", labels, lab_to_file(lab_xyz, vertical, travel), 200.0)
    trial = read_c3d(path)
    lm = resolve_landmarks(trial, allow_missing=REQUIRED_LANDMARKS)
    trial_lab, lm_lab = to_lab_frame(trial, lm)
    assert trial_lab.lab.vertical_axis == f"+{vertical}"
    assert trial_lab.lab.travel_axis == ("+x" if travel > 0 else "-x")
    np.testing.assert_allclose(lm_lab.points["left_asis"], lab_xyz[:, labels.index("l.asis")], atol=1e-6)
    check_sides(lm_lab)  # does not raise
    with pytest.raises(HamstrideError) as info:  # issue 13 acceptance: refused as not a run, never as swapped sides
        analyse_trial(path, FAST, athlete=ATHLETE)
    assert info.value.code == "not_running"
    assert "not a run" in str(info.value)


def test_landmarks_command_shows_the_lab_axes_and_prefixed_labels(tmp_path):
    """Shape: Y-up full-body file with prefixed labels through `hamstride landmarks` (lab axes from the landmarks)."""
    from typer.testing import CliRunner

    from hamstride.cli import app

    path = tmp_path / "yup.c3d"
    write_sprint_trial(path, SprintSpec(seed=9, full_body=True, vertical_axis="y", travel_sign=-1,
                                        label_prefix="Ath03", duration_s=1.0))
    result = CliRunner().invoke(app, ["landmarks", str(path)], env={"COLUMNS": "200"})
    assert result.exit_code == 0, result.output
    assert "vertical +y, travel -x" in result.output and "Ath03:r.asis" in result.output
