"""Real captures (issue 13, part B): the visible window of an overground capture volume, anatomical markers only in
the static trial, return-to-run jogging, and walks refused as not a run. Each test names the shape it covers.

The generated trials differ from the pipeline's assumptions: the true hip centre is 11 mm from the Harrington et al.
2007 estimate the pipeline uses (its own error is about 5/4/3 mm, a CT study found 12.3 +/- 5.9 mm; Mantovani et al.
2016, references.md [V]), thigh and shank skin markers slide and wobble on the bone by a few mm (soft-tissue
movement), and each marker enters and leaves the capture volume at its own place.
"""
from __future__ import annotations

import dataclasses
import json
import re

import numpy as np
import pytest
from scipy.spatial.transform import Rotation
from typer.testing import CliRunner

from hamstride.checks import check_marker_trial
from hamstride.cli import app
from hamstride.errors import EventError, LandmarkError
from hamstride.io import MarkerTrial, read_c3d, write_c3d
from hamstride.landmarks import REQUIRED_LANDMARKS, STATIC_RECOVERABLE, Landmarks, load_marker_map, visible_window
from hamstride.pipeline import AnalysisOptions, analyse_trial, landmarks_with_static, trial_kinematics
from hamstride.synth import AthleteBody, SprintSpec, simulate_walk, write_sprint_trial, write_static_trial

RATE = 250.0
FAST = AnalysisOptions(monte_carlo_samples=0)  # the band does not change what is tested here
# 11 mm from the regression: further back, lower and more lateral than Harrington et al. 2007 puts it
BODY = dataclasses.replace(AthleteBody.from_height(1.80, 75.0, "male"), hip_centre_offset_m=(-0.008, -0.006, 0.005))
SOFT_TISSUE_MM = 3.0
# Capture volume of 11 m along the travel, from 5.5 m: at 9 m/s the athlete (about 1.3 m from rear foot to front
# foot) is wholly inside for about (11 - 1.3) / 9 = 1.1 s of the 2.4 s file.
VOLUME_M = (5.5, 16.5)


@pytest.fixture(scope="module")
def shapes(tmp_path_factory):
    root = tmp_path_factory.mktemp("shapes")
    out = {}
    volume = root / "volume_9ms.c3d"
    out["volume"] = (volume, write_sprint_trial(volume, SprintSpec(
        speed_m_s=9.0, duration_s=2.4, seed=41, capture_volume_m=VOLUME_M, soft_tissue_mm=SOFT_TISSUE_MM, body=BODY)))
    clusters = root / "clusters_only.c3d"
    out["clusters"] = (clusters, write_sprint_trial(clusters, SprintSpec(
        speed_m_s=8.5, duration_s=2.0, seed=42, include_knee_ankle=False, soft_tissue_mm=SOFT_TISSUE_MM, body=BODY)))
    static = root / "static.c3d"
    write_static_trial(static, BODY, seed=43)
    out["static"] = static
    for speed in (3.0, 3.5, 5.0):
        path = root / f"jog_{speed:.1f}.c3d"
        out[f"jog_{speed:.1f}"] = (path, write_sprint_trial(path, SprintSpec(
            speed_m_s=speed, duration_s=2.4, seed=int(10 * speed), soft_tissue_mm=SOFT_TISSUE_MM, body=BODY)))
    return out


def _rms_deg(kin, truth) -> dict[str, float]:
    """RMS of the pipeline's angles against the truth over the analysed window (the file's frames it covers)."""
    out = {}
    start = kin.window.start
    for side in ("left", "right"):
        for name in ("hip_flexion", "hip_adduction", "knee_flexion"):
            est = np.asarray(kin.angles[side][name])
            true = np.asarray(truth.angles[side][name])[start:start + est.size]
            ok = np.isfinite(est)
            out[f"{side} {name}"] = float(np.degrees(np.sqrt(np.mean((est[ok] - true[ok]) ** 2))))
    return out


def _nearest_ms(times, truth_times) -> np.ndarray:
    times, truth_times = np.asarray(times, float), np.asarray(truth_times, float)
    return 1000.0 * np.array([np.min(np.abs(truth_times - t)) for t in times])


# ------------------------------------------------------------------------------------------ capture volume
def test_capture_volume_2_4_s_file_with_1_1_s_fully_visible_at_9_m_s_is_analysed(shapes):
    path, truth = shapes["volume"]
    result = analyse_trial(path, FAST)
    info = result.info
    # the window from the truth's own geometry: every required marker inside the volume, each marker's edges
    # moved by at most 0.15 m (synth), so the window starts between these two instants (and ends likewise)
    labels = {"asis", "psis", "knee.lat", "knee.med", "ankle.lat", "ankle.med", "heel", "met1", "met5"}
    xs = np.stack([x[:, 0] for lab, x in truth.markers_lab.items() if lab.split(".", 1)[1] in labels], axis=1)
    t = truth.time_s

    def first_inside(lo, hi):
        return t[np.flatnonzero(((xs >= lo) & (xs <= hi)).all(axis=1))[[0, -1]]]

    early_start, late_end = first_inside(VOLUME_M[0] - 0.15, VOLUME_M[1] + 0.15)
    late_start, early_end = first_inside(VOLUME_M[0] + 0.15, VOLUME_M[1] - 0.15)
    assert early_start - 0.01 <= info["window_start_s"] <= late_start + 0.01
    assert early_end - 0.01 <= info["window_end_s"] <= late_end + 0.01
    assert 0.95 <= info["window_duration_s"] <= 1.25  # about 1.1 s of the 2.4 s file
    assert info["n_frames"] == 600  # the file's frames
    # no gap complaints about the athlete being outside the volume
    assert not {"long_gap", "empty_frames"} & set(info["warning_codes"]), info["warnings"]
    # strides lie wholly inside the window, their times in the file's seconds, events at the truth's
    strides = result.strides.drop_duplicates(["side", "stride"])
    assert len(strides) >= 2
    assert (strides.foot_strike_s >= info["window_start_s"]).all()
    assert (strides.next_foot_strike_s <= info["window_end_s"]).all()
    for side in ("left", "right"):
        rows = strides[strides.side == side]
        assert np.all(_nearest_ms(rows.foot_strike_s, truth.foot_strikes_s[side]) < 5.0)  # Handsaker: +/-15 ms
        assert np.all(_nearest_ms(rows.toe_off_s, truth.toe_offs_s[side]) < 10.0)


def test_capture_volume_angles_within_2_deg_rms_of_truth(shapes):
    path, truth = shapes["volume"]
    rms = _rms_deg(trial_kinematics(path, FAST), truth)
    assert max(rms.values()) < 2.0, rms  # issue 13 acceptance
    assert max(rms.values()) > 0.1, rms  # the hip centre offset and skin movement show: the truth is not circular


def test_capture_volume_too_small_for_a_stride_fails_few_strides_naming_the_count(tmp_path):
    path = tmp_path / "small_volume.c3d"
    truth = write_sprint_trial(path, SprintSpec(speed_m_s=9.0, duration_s=2.4, seed=7, capture_volume_m=(7.0, 14.0),
                                                body=BODY))
    with pytest.raises(EventError) as info:
        analyse_trial(path, FAST)
    message = info.value.message
    assert info.value.code == "few_strides"
    found = re.search(r"(\d+) left and (\d+) right whole stride\(s\) were visible", message)
    assert found, message
    left, right = int(found.group(1)), int(found.group(2))
    assert min(left, right) == 0 and "capture volume" in message
    # the truth has at most this many whole strides per leg in the whole 7 m volume (0.8 s at 9 m/s, 0.45 s strides)
    assert left <= 1 and right <= 1 and len(truth.foot_strikes_s["left"]) >= 4


def _lm(visible: np.ndarray) -> Landmarks:
    """Every required landmark seen in the frames where ``visible`` is True (one column of the mask per landmark)."""
    points = {name: np.where(visible[:, [k % visible.shape[1]]], 1.0, np.nan) * np.ones((len(visible), 3))
              for k, name in enumerate(REQUIRED_LANDMARKS)}
    return Landmarks(trial="mask", rate_hz=RATE, points=points)


def test_visible_window_bridges_short_gaps_and_ignores_flicker_at_the_volume_edge():
    seen = np.zeros((500, 1), bool)
    seen[5:8] = True  # 3 frames of flicker at the entry (12 ms, shorter than 50 ms)
    seen[40:300] = True
    seen[120:126] = False  # a 6-frame gap inside: bridged (filled later)
    seen[200:240] = False  # a 40-frame gap inside: stays a gap inside the window (judged later)
    seen[300:460] = True
    window = visible_window(_lm(seen), max_gap_frames=10)
    assert (window.start, window.stop, window.n_frames) == (40, 460, 500)
    assert window.start_s == pytest.approx(40 / RATE) and window.end_s == pytest.approx(459 / RATE)
    assert not window.whole
    # nothing ever fully visible: the whole trial (the gap checks then say what is missing)
    staggered = np.zeros((500, 2), bool)
    staggered[:250, 0] = True
    staggered[250:, 1] = True
    assert visible_window(_lm(staggered)).whole


def test_empty_frames_before_entry_and_after_exit_are_not_gaps():
    xyz = np.full((400, 2, 3), np.nan)
    xyz[100:300] = 1.0
    trial = MarkerTrial("volume.c3d", ("a", "b"), xyz, RATE, 1, ())
    assert "empty_frames" not in {w.code for w in check_marker_trial(trial)}
    xyz[150:155] = np.nan  # every marker missing inside: a gap
    assert "empty_frames" in {w.code for w in check_marker_trial(MarkerTrial("volume.c3d", ("a", "b"), xyz, RATE, 1,
                                                                             ()))}


# ------------------------------------------------------------------------------------------ static calibration
def test_cluster_only_trial_with_static_rebuilds_every_knee_and_ankle_landmark(shapes):
    path, truth = shapes["clusters"]
    assert not any(label.split(".", 1)[1].startswith(("knee", "ankle")) for label in read_c3d(path).labels)
    result = analyse_trial(path, FAST, static_path=shapes["static"])
    rebuilt = result.info["rebuilt_landmarks"]
    assert set(STATIC_RECOVERABLE) <= set(rebuilt)  # lateral and medial epicondyles and malleoli, both sides
    assert all(rebuilt[name] > 95.0 for name in STATIC_RECOVERABLE)
    # rebuilt positions against the generator's bone-fixed truth: noise 0.5 mm, skin movement 3 mm (synth)
    kin = trial_kinematics(path, FAST, static_path=shapes["static"])
    for name in STATIC_RECOVERABLE:
        error = np.linalg.norm(kin.landmarks.points[name] - truth.landmarks_lab[name], axis=1)
        assert np.nanmedian(error) < 0.008, (name, np.nanmedian(error))


def test_cluster_only_trial_with_subject_prefixed_labels_rebuilds_from_the_static_trial(tmp_path):
    # Shape: capture software prefixes every label with the subject ('Ath07:r.thigh.a') in the runs but not in the
    # static trial; the default (unprefixed) cluster labels must still find the run's clusters.
    run = tmp_path / "prefixed_clusters_only.c3d"
    write_sprint_trial(run, SprintSpec(speed_m_s=8.5, duration_s=1.6, seed=44, include_knee_ankle=False,
                                       label_prefix="Ath07", body=BODY))
    static = tmp_path / "static.c3d"
    write_static_trial(static, BODY, seed=45)
    assert all(label.startswith("Ath07:") for label in read_c3d(run).labels)
    result = analyse_trial(run, FAST, static_path=static)
    assert set(STATIC_RECOVERABLE) <= set(result.info["rebuilt_landmarks"])


def test_cluster_only_angles_within_2_deg_rms_of_truth(shapes):
    path, truth = shapes["clusters"]
    rms = _rms_deg(trial_kinematics(path, FAST, static_path=shapes["static"]), truth)
    # issue 13 acceptance. Measured (worst angle): this trial 2.00 deg, just inside; other seeds of the same shape
    # 1.2-2.6 deg with 3 mm skin movement (seeds 1-4), 1.2-2.1 with 2 mm (seeds 1-7), 1.2 without: the clusters'
    # skin glide, levered out to the rebuilt epicondyles and malleoli, is what is left (issue 13 stays open on it)
    assert max(rms.values()) < 2.0, rms
    assert max(rms.values()) > 0.1, rms  # not circular


def test_rigid_fit_rebuild_agrees_with_scipy_align_vectors(shapes):
    # Reference: scipy's Rotation.align_vectors (Kabsch; a general-purpose library) on the same cluster markers and
    # the same static reference pose, for the right lateral epicondyle in every frame with the cluster seen.
    path, _ = shapes["clusters"]
    marker_map = load_marker_map(None)
    lm, seen, recoverable, calibration = landmarks_with_static(read_c3d(path), marker_map, shapes["static"])
    assert "right_lateral_epicondyle" in recoverable and "right_lateral_epicondyle" not in seen.points
    rset = next(s for s in calibration.sets if s.segment == "right_thigh")
    cluster_rows = [i for i, m in enumerate(rset.members) if "#" in m]
    target = rset.members.index("right_lateral_epicondyle")
    observed = seen.clusters["right_thigh_cluster"]  # [F, 3, 3], the file's (unfiltered) cluster markers
    checked = 0
    for f in range(0, observed.shape[0], 7):
        if not np.isfinite(observed[f]).all():
            continue
        ref = rset.reference[cluster_rows]
        rot, _ = Rotation.align_vectors(observed[f] - observed[f].mean(axis=0), ref - ref.mean(axis=0))
        expected = rot.apply(rset.reference[target] - ref.mean(axis=0)) + observed[f].mean(axis=0)
        assert np.allclose(lm.points["right_lateral_epicondyle"][f], expected, atol=1e-6)
        checked += 1
    assert checked > 50


def test_cluster_only_trial_without_static_names_the_static_trial(shapes):
    path, _ = shapes["clusters"]
    with pytest.raises(LandmarkError) as info:
        analyse_trial(path, FAST)
    assert info.value.code == "landmark_missing" and "--static" in info.value.message


def test_landmarks_command_shows_what_the_static_trial_rebuilt(shapes):
    path, _ = shapes["clusters"]
    result = CliRunner().invoke(app, ["landmarks", str(path), "--static", str(shapes["static"])],
                                env={"COLUMNS": "200"})
    assert result.exit_code == 0, result.output
    assert "rebuilt from the static trial" in result.output
    assert "rebuilt from static.c3d: " in result.output and "right lateral epicondyle (100% of frames)" in result.output


def test_analyze_command_reports_the_window(shapes, tmp_path):
    path, _ = shapes["volume"]
    result = CliRunner().invoke(app, ["analyze", str(path), "--out", str(tmp_path / "one")], env={"COLUMNS": "200"})
    assert result.exit_code == 0, result.output
    assert re.search(r"analysed window \d\.\d\d-\d\.\d\d s \(1\.\d\d s", result.output), result.output


def test_squad_manifest_records_window_and_rebuilt_landmarks(shapes, tmp_path):
    from hamstride.batch import RunConfig, run_squad

    root = tmp_path / "squad"
    session = root / "VOL01" / "2026-04-01_return"
    session.mkdir(parents=True)
    (root / "athletes.csv").write_text("athlete,body_mass_kg,height_m,sex,involved_side,injury_date\n"
                                       "VOL01,75,1.80,male,none,\n", encoding="utf-8")
    for name, source in (("run_volume.c3d", shapes["volume"][0]), ("run_clusters.c3d", shapes["clusters"][0]),
                         ("static.c3d", shapes["static"])):
        (session / name).write_bytes(source.read_bytes())
    run = run_squad(root, tmp_path / "out", jobs=1, report=False, config=RunConfig(FAST))
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    records = {r["file"].split("/")[-1]: r for r in manifest["inputs"]}
    assert run.failed == [], run.failed
    volume, clusters = records["run_volume.c3d"], records["run_clusters.c3d"]
    assert 0.95 <= volume["window_duration_s"] <= 1.25 and volume["window_start_s"] > 0.3
    assert clusters["window_start_s"] == 0.0 and set(STATIC_RECOVERABLE) <= set(clusters["rebuilt_landmarks"])


# ------------------------------------------------------------------------------------------ return-to-run speeds
@pytest.mark.parametrize("speed", [3.0, 3.5, 5.0])
def test_jogging_at_return_to_run_speeds_is_analysed_with_its_speed(shapes, speed):
    path, truth = shapes[f"jog_{speed:.1f}"]
    result = analyse_trial(path, FAST)
    strides = result.strides.drop_duplicates(["side", "stride"])
    assert result.info["n_strides"]["left"] >= 1 and result.info["n_strides"]["right"] >= 1
    assert result.info["speed_m_s"] == pytest.approx(speed, rel=0.03)
    assert np.allclose(strides.speed_m_s, result.info["speed_m_s"])  # speed kept in the outputs
    for side in ("left", "right"):
        rows = strides[strides.side == side]
        assert np.all(_nearest_ms(rows.foot_strike_s, truth.foot_strikes_s[side]) < 5.0)
        # jogging contacts (0.2-0.3 s) pass the widened plausibility limits (toe-off timing is the events stage's
        # concern: at 3.5 m/s one toe-off of this trial comes 57 ms late, the others within 5 ms)
        contact = (rows.toe_off_s - rows.foot_strike_s).to_numpy()
        assert np.all((contact > 0.12) & (contact < 0.32)), contact
    assert not {"stride_rejected"} & set(result.info["warning_codes"]), result.info["warnings"]


def test_jogging_at_3_m_s_looks_like_jogging(shapes):
    # Published values: stride 0.63-0.80 s at 3.0 m/s (75-95 strides/min, optimum 84.8; Lieberman et al. 2015,
    # J Exp Biol 218:3406 [V, abstract]); contact about 0.25-0.30 s [M, from memory]; a jog flexes hip and knee less
    # than a sprint (common practice), and still has a flight phase (it is a run).
    _, jog = shapes["jog_3.0"]
    _, sprint = shapes["volume"]
    for side in ("left", "right"):
        fs, to = jog.foot_strikes_s[side], jog.toe_offs_s[side]
        stride = np.diff(fs)
        contact = np.array([to[to > t][0] - t for t in fs[:-1]])
        assert np.all((stride > 0.63) & (stride < 0.80)), stride
        assert np.all((contact > 0.24) & (contact < 0.31)), contact
        assert np.all(contact < 0.5 * stride)  # flight between steps
        for name in ("hip_flexion", "knee_flexion"):
            assert jog.angles[side][name].max() < sprint.angles[side][name].max() - np.radians(10)


def test_slower_than_the_floor_is_refused_and_the_option_still_works(shapes):
    path, _ = shapes["jog_3.0"]
    with pytest.raises(EventError) as info:
        analyse_trial(path, dataclasses.replace(FAST, min_speed_m_s=4.0))
    assert info.value.code == "not_sprint" and "3.0 m/s" in info.value.message


# ------------------------------------------------------------------------------------------ walking
def _with_upper_body(labels, xyz):
    """Add trunk, head and arm markers (our own invented labels) above the pelvis: a full-body marker set."""
    pelvis = np.nanmean(xyz[:, [labels.index(k) for k in ("r.asis", "l.asis", "r.psis", "l.psis")]], axis=1)
    offsets_mm = {"trunk.c7": (-100, 0, 550), "trunk.sternum": (80, 0, 400), "head.front": (80, 0, 780),
                  "head.back": (-80, 0, 760), "r.shoulder": (0, -190, 500), "l.shoulder": (0, 190, 500),
                  "r.elbow": (-50, -220, 220), "l.elbow": (50, 220, 220), "r.wrist": (50, -240, 0),
                  "l.wrist": (-50, 240, 0)}
    extra = np.stack([pelvis + np.array(v, float) for v in offsets_mm.values()], axis=1)
    return list(labels) + list(offsets_mm), np.concatenate([xyz, extra], axis=1)


@pytest.mark.parametrize("full_body", [False, True])
def test_walking_is_refused_as_not_a_run(tmp_path, full_body):
    labels, xyz, _ = simulate_walk(BODY, speed_m_s=1.3, duration_s=3.0, seed=5)  # file axes = lab axes, mm
    labels = list(labels)
    if full_body:
        labels, xyz = _with_upper_body(labels, xyz)
    path = tmp_path / f"walk{'_full_body' if full_body else ''}.c3d"
    write_c3d(path, labels, xyz, RATE)
    with pytest.raises(EventError) as info:
        analyse_trial(path, FAST)
    assert info.value.code == "not_running"
    assert "not a run" in info.value.message and "no flight phase" in info.value.message
    assert "swapped" not in info.value.message


def test_marker_events_at_the_window_edges_are_not_trusted():
    from hamstride.events import GaitEvents, drop_events_near_edges

    times = {"left": np.array([0.004, 0.30, 0.96]), "right": np.array([0.015, 0.60, 0.99])}
    marker = GaitEvents(times, times, "markers")
    # 251 frames at 250 Hz (0-1 s); a 20 ms guard (events.GAP_GUARD_S, as next to a gap) at both edges
    kept, dropped = drop_events_near_edges(marker, 251, RATE, start=True, end=True)
    assert list(kept.foot_strikes_s["left"]) == [0.30, 0.96] and list(kept.foot_strikes_s["right"]) == [0.60]
    assert dropped == sorted([0.004, 0.015, 0.99] * 2)
    # only the entry edge is a volume edge: the file's own end keeps its events
    kept, _ = drop_events_near_edges(marker, 251, RATE, start=True, end=False)
    assert list(kept.toe_offs_s["right"]) == [0.60, 0.99]
    # events read from the file are kept
    assert drop_events_near_edges(GaitEvents(times, times, "c3d"), 251, RATE, start=True, end=True)[1] == []


def test_plate_contacts_keep_file_time_when_the_window_starts_late(tmp_path):
    # Shape: an instrumented treadmill whose markers are seen only from 0.4 s (labelling started late), so the
    # analysed window starts there; the plates' vertical force still starts at the file's first frame. Truth: the
    # generator's contact model (synth.simulate_run), independent of both the plates and the marker rule.
    from hamstride.synth import RunSpec, simulate_run

    spec = RunSpec(speed_m_s=3.5, plates="treadmill", treadmill=True, seed=3)
    labels, xyz, truth = simulate_run(spec)
    late = int(0.4 * spec.rate_hz)
    xyz = xyz.copy()
    xyz[:late] = np.nan
    path = tmp_path / "treadmill_seen_late.c3d"
    write_c3d(path, labels, xyz * 1000.0, spec.rate_hz, units="mm", force_plates=truth.plates,
              analog_rate_hz=spec.analog_rate_hz)
    result = analyse_trial(path, FAST, markers=None)
    assert result.info["window_start_s"] == pytest.approx(0.4, abs=0.01)
    strides = result.strides.drop_duplicates(["side", "stride"])
    plate = strides[strides["event_source"] == "plate"]
    assert len(plate) >= 2
    for side, rows in plate.groupby("side"):
        errors = [1000.0 * np.min(np.abs(truth.foot_strikes_s[side] - t)) for t in rows["foot_strike_s"]]
        assert max(errors) < 1.0, errors  # the 20 N threshold: under 1 ms at strike (test_plates)
