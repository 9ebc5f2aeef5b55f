"""Force plates and event sources on the running-feet generator (curved rolling sole with pad compression, heel
cluster, no toe marker, flat-foot hovers above the floor, plates overground and under a treadmill belt).

Truth comes from the generator's contact model (the instants the undeformed sole touches and leaves the floor),
not from the plate reader or the marker rules.
"""
from __future__ import annotations

import functools
import pathlib
import tempfile

import numpy as np
import pytest

from hamstride.io import read_c3d
from hamstride.labframe import to_lab_frame
from hamstride.landmarks import load_marker_map, resolve_landmarks
from hamstride.plates import CONTACT_THRESHOLD_N, apply_plate_contacts, attach_force_plates, force_contacts
from hamstride.signal import smooth_landmarks
from hamstride.synth import GRAVITY, RunSpec, simulate_run, write_run_trial
from hamstride.events import detect_events

SIDES = ("left", "right")


def _nearest_errors_ms(found: np.ndarray, truth: np.ndarray) -> np.ndarray:
    found = np.asarray(found, float)
    if not found.size or not truth.size:
        return np.empty(0)
    d = found[:, None] - truth[None, :]
    return 1000.0 * d[np.arange(found.size), np.argmin(np.abs(d), axis=1)]


def _lab_trial(path, markers=None):
    """(trial, landmarks) in the internal lab frame, as the pipeline reads them (before filtering)."""
    trial = read_c3d(path)
    return to_lab_frame(trial, resolve_landmarks(trial, load_marker_map(markers)))


def _events(path):
    trial, raw = _lab_trial(path)
    trial = attach_force_plates(trial)
    lm, _ = smooth_landmarks(raw, keep_clusters=False)
    return trial, lm, detect_events(lm, unfiltered=raw)  # as the pipeline calls it


def test_generator_plate_impulse_matches_body_weight():
    # physics: over whole steps the mean vertical ground reaction force equals body weight (Newton's second law over
    # a periodic step); the two treadmill plates (one per belt half) together see every contact
    spec = RunSpec(speed_m_s=3.5, plates="treadmill", treadmill=True, duration_s=3.0, force_noise_n=0.0)
    _, _, truth = simulate_run(spec)
    total = truth.plates[0].vertical_force_n + truth.plates[1].vertical_force_n
    t = np.arange(total.size) / spec.analog_rate_hz
    first = min(truth.foot_strikes_s[s][0] for s in SIDES)
    strikes = np.sort(np.concatenate([truth.foot_strikes_s[s] for s in SIDES]))
    a, b = strikes[0], strikes[-1]
    inside = (t >= a) & (t < b)
    mean_force = total[inside].mean()
    assert first >= 0
    assert mean_force == pytest.approx(spec.body.mass_kg * GRAVITY, rel=0.04)


def test_generator_marker_heights_are_realistic():
    # heel and metatarsal skin markers sit 2-3 cm above the floor in stance (issue 13); no toe marker by default,
    # three heel markers
    labels, _, truth = simulate_run(RunSpec(speed_m_s=9.0))
    assert "r.toe" not in labels and {"r.heel", "r.heel.up", "r.heel.side"} <= set(labels)
    for name in ("r.heel", "r.met1", "l.met1", "l.met5"):
        floor = np.percentile(truth.markers_lab[name][:, 2], 2)
        assert 0.012 < floor < 0.032, name


def _sole_contact_kinematics(speed: float, seeds=range(3)):
    """Lowest point of the generator's undeformed sole around each whole contact: (vertical speed in the 2 ms before
    touchdown, m/s, negative down; rise 10 ms after toe-off, mm; mean vertical acceleration 1-5 ms after toe-off)."""
    from hamstride.synth import _RunFoot, _run_contacts

    td, rise, acc = [], [], []
    for seed in seeds:
        spec = RunSpec(speed_m_s=speed, seed=seed)
        contacts, _, _ = _run_contacts(spec, np.random.default_rng(seed))
        for side in SIDES:
            foot = _RunFoot(spec.body.foot_length_m, contacts[side], spec.body.mass_kg * GRAVITY)
            for c in foot.contacts[1:-1]:
                for t_event, kind in ((c["t0"], "td"), (c["t1"], "to")):
                    t = t_event + np.arange(-20, 21) * 1e-3
                    x, z, th = foot.pose(t).T
                    low = (z[:, None] + np.outer(np.sin(th), foot.pts[:, 0])
                           + np.outer(np.cos(th), foot.pts[:, 1])).min(axis=1)
                    if kind == "td":
                        td.append((low[19] - low[17]) / 2e-3)
                    else:
                        rise.append(1000.0 * low[30])
                        acc.append((low[25] - 2 * low[23] + low[21]) / 2e-3 ** 2)
    return np.array(td), np.array(rise), np.array(acc)


@pytest.mark.parametrize("speed", [3.5, 9.0])
def test_generator_feet_land_and_lift_like_runners_feet(speed):
    # touchdown: the foot falls onto the floor and the pad stops it. Rear-foot strikers' heels arrive at about
    # 0.5-1.5 m/s (from memory; the two-mass model of Clark et al. 2017, J Exp Biol 220:247 [V], has the stance
    # foot and shank brought to rest in the impact); the earlier generator's heel arrived at 0.04-0.43 m/s.
    # Toe-off: once released the toe is lifted by the swinging shank, about 8-14 rad/s x 0.43 m -> 25-85 m/s^2
    # (physics estimate, from memory; up to 20 rad/s at top speed), so it is clearly off the floor (>= 1 mm, i.e.
    # >= 20 m/s^2 on average) within 10 ms; the earlier generator's sole was 0.1 mm up 10 ms after toe-off at
    # 3.5 m/s (about 2 m/s^2), and its foot stopped dead at toe-off (the swing started from zero velocity).
    td, rise, acc = _sole_contact_kinematics(speed)
    assert td.size >= 10 and rise.size >= 10
    if speed < 5.0:  # heel landings
        assert np.all((td <= -0.5) & (td >= -1.5)), td
    else:  # forefoot landings: bounded below only (sprinters' feet come down faster, from memory)
        assert np.all((td <= -0.4) & (td >= -3.0)), td
    assert np.all((rise >= 1.0) & (rise <= 20.0)), rise
    assert np.all((acc >= 15.0) & (acc <= 170.0)), acc  # 170 m/s^2: 20 rad/s x 0.43 m, a sprinter's shank


def test_plates_read_through_ezc3d_agree_with_the_independent_c3d_reader(tmp_path):
    # reference library: the pure-Python `c3d` package reads the raw analog channels; our vertical force is the
    # scaled Fz channel (ANALOG:SCALE x GEN_SCALE, offset 0 here)
    c3d = pytest.importorskip("c3d")
    path = tmp_path / "run_overground_plates.c3d"
    write_run_trial(path, RunSpec(speed_m_s=9.0, plates="overground", seed=1))
    plain, _ = _lab_trial(path)
    assert plain.meta["force_platforms"] == 2 and plain.force_plates == ()
    trial = attach_force_plates(plain)
    assert len(trial.force_plates) == 2
    with open(path, "rb") as fh:
        reader = c3d.Reader(fh)
        labels = [s.strip() for s in reader.analog_labels]
        analog = np.concatenate([a for _, _, a in reader.read_frames()], axis=1)  # [channels, samples]
        scale = reader.get("ANALOG:SCALE").float_array * reader.get("ANALOG:GEN_SCALE").float_value
    for plate in trial.force_plates:
        k = labels.index(f"Fz{plate.index}")
        np.testing.assert_allclose(plate.vertical_force_n, np.abs(analog[k] * scale[k]), atol=1e-2)
        # corners in the lab, metres, on the floor
        assert np.allclose(plate.corners_lab_m[:, 2], 0.0, atol=1e-6)
        assert 0.55 < np.ptp(plate.corners_lab_m[:, 0]) < 0.65


def test_force_threshold_interpolates_between_samples():
    # a ramp crossing 20 N between samples: the crossing sits where the straight line meets 20 N
    rate = 1000.0
    f = np.concatenate([np.zeros(10), np.linspace(0, 1000, 101), np.full(100, 1000.0), np.linspace(1000, 0, 101),
                        np.zeros(10)])
    (start, end), = force_contacts(f, rate)
    assert start == pytest.approx((10 + CONTACT_THRESHOLD_N / 10.0) / rate, abs=1e-9)
    # the fall starts at sample 10 + 101 + 100 = 211 from 1000 N, 10 N per sample
    assert end == pytest.approx((211 + (1000.0 - CONTACT_THRESHOLD_N) / 10.0) / rate, abs=1e-9)


@pytest.mark.parametrize("speed", [3.5, 9.0])
def test_treadmill_plates_time_every_contact_within_a_millisecond(tmp_path, speed):
    # instrumented treadmill: one plate under each belt half; every contact is timed by a plate and assigned to the
    # foot over it; no toe marker, heel cluster, flat-foot hovers in some landings
    path = tmp_path / f"treadmill_{speed}.c3d"
    truth = write_run_trial(path, RunSpec(speed_m_s=speed, plates="treadmill", treadmill=True, seed=2))
    trial, lm, events = _events(path)
    new, report = apply_plate_contacts(events, trial.force_plates, lm)
    assert report is not None and not report.left_out
    for side in SIDES:
        assert set(new.foot_strike_sources[side]) == {"plate"}
        fs = _nearest_errors_ms(new.foot_strikes_s[side], truth.foot_strikes_s[side])
        to = _nearest_errors_ms(new.toe_offs_s[side], truth.toe_offs_s[side])
        assert fs.size == truth.foot_strikes_s[side].size
        # the 20 N threshold is crossed 20 N / (loading rate) from the contact: under 1 ms at strike (>= 50 kN/s),
        # about 1 ms early at toe-off when jogging (unloading about 20 kN/s); 2 ms bounds both (physics of a threshold)
        assert np.abs(fs).max() < 1.0 and np.abs(to).max() < 2.0
    assert report.offsets["foot_strike_ms"]["n"] >= 6


def test_overground_plates_replace_only_the_contacts_on_them(tmp_path):
    path = tmp_path / "overground.c3d"
    truth = write_run_trial(path, RunSpec(speed_m_s=9.0, plates="overground", seed=4))
    trial, lm, events = _events(path)
    new, report = apply_plate_contacts(events, trial.force_plates, lm)
    for side in SIDES:
        sources = np.asarray(new.foot_strike_sources[side])
        assert (sources == "plate").sum() == 1 and (sources == "markers").sum() >= 3
        on_plate = new.foot_strikes_s[side][sources == "plate"]
        assert np.abs(on_plate - truth.plate_contacts[side][:, 0]).max() < 1e-3


def test_analyse_trial_reports_event_source_and_marker_offset(tmp_path):
    from hamstride.pipeline import STRIDE_COLUMNS, AnalysisOptions, AthleteInfo, analyse_trial

    path = tmp_path / "treadmill_9.c3d"
    write_run_trial(path, RunSpec(speed_m_s=9.0, plates="treadmill", treadmill=True, seed=3))
    res = analyse_trial(path, AnalysisOptions(monte_carlo_samples=0), athlete=AthleteInfo(body_mass_kg=75.0))
    assert "event_source" in STRIDE_COLUMNS
    assert set(res.strides["event_source"]) == {"plate"}
    offsets = res.info["force_plates"]["marker_offset_from_plates"]
    assert offsets["foot_strike_ms"]["n"] > 0 and np.isfinite(offsets["toe_off_ms"]["median"])
    plain = tmp_path / "plain_9.c3d"
    write_run_trial(plain, RunSpec(speed_m_s=9.0, seed=3))
    res = analyse_trial(plain, AnalysisOptions(monte_carlo_samples=0), athlete=AthleteInfo(body_mass_kg=75.0))
    assert set(res.strides["event_source"]) == {"markers"} and "force_plates" not in res.info


@functools.lru_cache(maxsize=None)
def _marker_rule_run(speed: float, seed: int, heel_map: bool = False, noise_mm: float = 0.5,
                     soft_tissue_mm: float = 2.0):
    """Generator truth and marker-rule events (no plates in the file), optionally with the heels mapped to other
    markers of the heel cluster, more marker noise or more soft-tissue wobble."""
    with tempfile.TemporaryDirectory() as tmp:
        path = pathlib.Path(tmp) / "run.c3d"
        spec = RunSpec(speed_m_s=speed, plates="none", seed=seed, noise_mm=noise_mm, soft_tissue_mm=soft_tissue_mm)
        truth = write_run_trial(path, spec)
        markers = None
        if heel_map:
            markers = pathlib.Path(tmp) / "markers.toml"
            markers.write_text('[landmarks]\nright_heel = "r.heel.up"\nleft_heel = "l.heel.side"\n')
        trial, raw = _lab_trial(path, markers)
        lm, _ = smooth_landmarks(raw, keep_clusters=False)
        # as the pipeline calls it: the touchdown changepoint is fitted to the unfiltered heights
        return truth, detect_events(lm, unfiltered=raw), (trial.n_frames - 1) / spec.rate_hz


def _marker_rule_errors(speed: float, seeds=range(4), heel_map: bool = False, **spec):
    """(foot strike, toe-off, hover flag per foot strike): marker rule minus the generator's contact times, ms, for
    the events seen whole (>= 30 ms inside the recording, as in benchmarks/events_running.py: an event 2 frames
    from the start has no data on one side for any rule)."""
    fs, to, hover = [], [], []
    for seed in seeds:
        truth, events, end = _marker_rule_run(speed, seed, heel_map, **spec)
        for side in SIDES:
            strikes, toe_offs = truth.foot_strikes_s[side], truth.toe_offs_s[side]
            seen_fs = (strikes >= 0.03) & (strikes <= end - 0.03)
            seen_to = (toe_offs >= 0.03) & (toe_offs <= end - 0.03)
            fs.append(-_nearest_errors_ms(strikes[seen_fs], events.foot_strikes_s[side]))
            to.append(-_nearest_errors_ms(toe_offs[seen_to], events.toe_offs_s[side]))
            hover.append(truth.level_off[side][seen_fs])
    return np.concatenate(fs), np.concatenate(to), np.concatenate(hover).astype(bool)


def test_forefoot_levelling_off_above_the_floor_does_not_fire_in_the_air():
    # 3.5 m/s heel-first landings where the forefoot hovers flat just above the floor for 30-150 ms first (issue 13
    # item 7: the rule fired 56-69 ms early on such a real run); those strikes must lie within the published
    # marker-vs-plate limits of agreement (about +/-15 ms, Handsaker et al. 2016, references.md)
    fs, _, hover = _marker_rule_errors(3.5, seeds=range(6))
    assert hover.sum() >= 8
    assert np.abs(fs[hover]).max() <= 15.0


def test_no_toe_marker_toe_off_within_published_agreement():
    # no toe marker in the file: toe-off from the first-metatarsal marker; 95th percentile within the issue's
    # 20 ms and every toe-off within 25 ms, at jogging and sprinting speeds
    for speed in (3.5, 9.0):
        _, to, _ = _marker_rule_errors(speed)
        assert to.size >= 20
        assert np.percentile(np.abs(to), 95) <= 20.0 and np.abs(to).max() <= 25.0


def test_heel_cluster_any_heel_marker_mapped():
    # a heel cluster of three markers: the heel landmark mapped to the upper (right) or the lateral (left) one
    # still gives every foot strike within 25 ms, and a median |error| no more than 1 ms above the default heel
    # marker's (measured: 3.5 m/s 1.9 vs 1.9 ms, 9 m/s 1.0 vs 0.8 ms; before the touchdown changepoint 3.7 vs 5.1 ms
    # and 6.2 vs 6.2 ms; the absolute limits are the acceptance test's below)
    for speed in (3.5, 9.0):
        fs, _, _ = _marker_rule_errors(speed, heel_map=True)
        default, _, _ = _marker_rule_errors(speed)
        assert fs.size >= 20 and np.abs(fs).max() <= 25.0
        assert np.median(np.abs(fs)) <= np.median(np.abs(default)) + 1.0


@pytest.mark.parametrize("soft_tissue_mm", [2.0, 6.0])
@pytest.mark.parametrize("speed", [2.5, 3.5, 5.0, 7.0, 9.0])
def test_marker_rule_finds_every_contact_and_no_other_from_jogging_to_sprinting(speed, soft_tissue_mm):
    # marker rule alone (no plates, no toe marker, heel cluster) from a 2.5 m/s jog (heel landings) to a 9 m/s sprint
    # (forefoot landings), with the generator's default and a threefold skin-marker wobble after touchdown: every
    # contact seen whole (truth event >= 30 ms inside the recording) is found, nothing else is found, and every event
    # lies within 25 ms of the contact model's (measured max 8.5 ms for foot strikes, 10.6 ms for toe-offs; the
    # published marker-vs-plate limits of agreement are about -12 to +18 ms, Handsaker et al. 2016, references.md)
    for seed in range(4):
        truth, events, end = _marker_rule_run(speed, seed, soft_tissue_mm=soft_tissue_mm)
        for side in SIDES:
            for kind, found, true in (("foot strike", events.foot_strikes_s[side], truth.foot_strikes_s[side]),
                                      ("toe-off", events.toe_offs_s[side], truth.toe_offs_s[side])):
                seen = true[(true >= 0.03) & (true <= end - 0.03)]
                missed = np.abs(_nearest_errors_ms(seen, found)) if found.size else np.full(seen.size, np.inf)
                extra = np.abs(_nearest_errors_ms(found, true))
                assert seen.size >= 2 and np.all(missed <= 25.0), (seed, side, kind, missed)
                assert np.all(extra <= 25.0), (seed, side, kind, found, true)


ACCEPTANCE_SEEDS = range(8)  # the seeds of benchmarks/events_running.py (4 seeds: 3.5 m/s FS median 5.1 ms)


@pytest.mark.parametrize("speed", [3.5, 9.0])
@pytest.mark.xfail(strict=True, reason="3 mm marker noise: Winter's residual analysis then picks about 9-13 Hz "
                   "instead of 17-25 Hz and smooths the landing, so foot strikes come late at 9 m/s; detecting the "
                   "events at a fixed higher cutoff instead trades this for noise outliers (events.py); some "
                   "jogging toe-offs are still missed or taken early. The touchdown changepoint rarely helps here: "
                   "its 95 % interval is mostly wider than 8 ms with 3 mm noise, so the rule's strike stands. 8 "
                   "seeds, |error| median / p95: 3.5 m/s FS 4.3 / 12.1 ms, TO 6.6 / 37.2 ms; 9 m/s FS 9.7 / 12.7 "
                   "ms, TO 3.0 / 9.2 ms")
def test_marker_rule_with_3_mm_marker_noise_meets_issue_13_acceptance(speed):
    # robustness of the acceptance (below) to 3 mm of marker noise, the largest the issue asks about
    fs, to, _ = _marker_rule_errors(speed, seeds=ACCEPTANCE_SEEDS, noise_mm=3.0)
    assert np.median(np.abs(fs)) <= 5.0 and np.percentile(np.abs(fs), 95) <= 12.0
    assert np.median(np.abs(to)) <= 10.0 and np.percentile(np.abs(to), 95) <= 20.0


def test_sprint_toe_offs_with_3_mm_marker_noise_are_taken_where_the_foot_leaves_the_floor():
    # 3 mm noise on every marker, 9 m/s, no toe marker: the third derivative of the filtered first-metatarsal height
    # has peaks as large as the toe-off's in mid-stance, where the foot is flat; the rule takes the jerk peak only
    # where the foot is leaving the floor (toe rising, heel lifted). Before: p95 55.7 ms, ~8 % of toe-offs 45-64 ms
    # early; the issue 13 toe-off limits (median <= 10 ms, p95 <= 20 ms) hold with noise.
    _, to, _ = _marker_rule_errors(9.0, seeds=ACCEPTANCE_SEEDS, noise_mm=3.0)
    assert to.size >= 100  # every contact seen whole (105 over the 8 seeds)
    assert np.median(np.abs(to)) <= 10.0 and np.percentile(np.abs(to), 95) <= 20.0


@pytest.mark.parametrize("speed", [3.5, 9.0])
def test_marker_rule_alone_meets_issue_13_acceptance(speed):
    # issue 13 acceptance: marker rule alone (plates removed, no toe marker, heel cluster), generated running at
    # 3.5 and 9 m/s whose feet land and lift like runners' feet (test_generator_feet_land_and_lift_like_runners_feet).
    # Measured, 8 seeds, foot strike |error| median / p95 / max (bias): 3.5 m/s 1.8 / 6.7 / 9.7 ms (-0.9), 9 m/s
    # 0.9 / 2.1 / 6.9 ms (-0.8) with the touchdown changepoint; the rule alone was 4.3 / 7.7 / 9.7 (-1.3) and
    # 6.1 / 6.8 / 7.3 ms (+6.1: the forefoot marker still ~9 mm above its stance floor level at touchdown)
    fs, to, _ = _marker_rule_errors(speed, seeds=ACCEPTANCE_SEEDS)
    assert np.median(np.abs(fs)) <= 5.0 and np.percentile(np.abs(fs), 95) <= 12.0
    assert np.median(np.abs(to)) <= 10.0 and np.percentile(np.abs(to), 95) <= 20.0


def test_analyze_command_prints_the_marker_rule_offset(tmp_path):
    from typer.testing import CliRunner

    from hamstride.cli import app

    path = tmp_path / "treadmill_plates.c3d"
    write_run_trial(path, RunSpec(speed_m_s=9.0, plates="treadmill", treadmill=True, seed=5))
    result = CliRunner().invoke(app, ["analyze", str(path), "--body-mass", "75", "--out", str(tmp_path / "out")])
    assert result.exit_code == 0, result.output
    text = " ".join(result.output.split())  # the console wraps long lines
    assert "force plates:" in text and "marker rule minus plates: foot strike" in text
    header = (tmp_path / "out" / "strides.csv").read_text().splitlines()[0].split(",")
    assert header[-1] == "event_source"
