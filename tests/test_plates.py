"""Force plates and event sources on the running-feet generator (curved rolling sole with pad compression, heel
cluster, no toe marker, flat-foot hovers above the floor, plates overground and under a treadmill belt).

Truth comes from the generator's contact model (the instants the undeformed sole touches and leaves the floor),
not from the plate reader or the marker rules.
"""
from __future__ import annotations

import numpy as np
import pytest

from hamstride.io import read_c3d
from hamstride.landmarks import load_marker_map, resolve_landmarks
from hamstride.plates import (CONTACT_THRESHOLD_N, apply_plate_contacts, attach_force_plates, force_contacts,
                              has_force_plates)
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


def _events(path):
    trial = attach_force_plates(read_c3d(path))
    lm = resolve_landmarks(trial, load_marker_map(None))
    lm, _ = smooth_landmarks(lm, keep_clusters=False)
    return trial, lm, detect_events(lm)


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


def test_plates_read_through_ezc3d_agree_with_the_independent_c3d_reader(tmp_path):
    # reference library: the pure-Python `c3d` package reads the raw analog channels; our vertical force is the
    # scaled Fz channel (ANALOG:SCALE x GEN_SCALE, offset 0 here)
    c3d = pytest.importorskip("c3d")
    path = tmp_path / "run_overground_plates.c3d"
    write_run_trial(path, RunSpec(speed_m_s=9.0, plates="overground", seed=1))
    assert has_force_plates(path)
    trial = attach_force_plates(read_c3d(path))
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


def _marker_rule_errors(speed: float, seeds=range(4)):
    """Marker-rule events (plates removed from the file) against the generator's contact times."""
    fs, to = [], []
    import tempfile, pathlib
    with tempfile.TemporaryDirectory() as tmp:
        for seed in seeds:
            path = pathlib.Path(tmp) / "run.c3d"
            truth = write_run_trial(path, RunSpec(speed_m_s=speed, plates="none", seed=seed))
            _, _, events = _events(path)
            for side in SIDES:
                fs.append(_nearest_errors_ms(truth.foot_strikes_s[side], events.foot_strikes_s[side]))
                to.append(_nearest_errors_ms(truth.toe_offs_s[side], events.toe_offs_s[side]))
    return -np.concatenate(fs), -np.concatenate(to)


@pytest.mark.parametrize("speed", [3.5, 9.0])
@pytest.mark.xfail(strict=True, reason="issue 13 item 7 not solved yet: on the running-feet generator (flat-foot "
                   "hovers, no toe marker) the marker rule fires in the air on hovering landings and toe-off runs "
                   "about 11-12 ms late; acceptance needs FS median <= 5 / p95 <= 12 ms, TO median <= 10 / p95 <= 20")
def test_marker_rule_alone_meets_issue_13_acceptance(speed):
    fs, to = _marker_rule_errors(speed)
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
