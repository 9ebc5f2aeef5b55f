"""C3D reading and writing, cross-checked against the independent pure-Python `c3d` reader and ezc3d round trips.

C3D facts (c3d.org user guide): >255 labels continue in POINT:LABELS2; a negative residual marks an invalid point;
POINT:UNITS documents mm/cm/m; EVENT:TIMES are (minutes, seconds) pairs.
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest

from hamstride.errors import FileFormatError
from hamstride.io import check_c3d_header, read_c3d, write_c3d
from hamstride.labframe import to_lab_frame
from hamstride.landmarks import REQUIRED_LANDMARKS, resolve_landmarks

c3d = pytest.importorskip("c3d")


def _walker(n_frames=200, rate=200.0, speed=8.0, n_extra=0, seed=0):
    """A small marker cloud moving forward along +x (Z-up, mm): pelvis high, feet low, like a runner."""
    rng = np.random.default_rng(seed)
    t = np.arange(n_frames) / rate
    base = np.array([[0.0, 130.0, 1000.0], [0.0, -130.0, 1000.0], [-150.0, 50.0, 1020.0], [-150.0, -50.0, 1020.0],
                     [20.0, 60.0, 500.0], [20.0, -60.0, 500.0], [-40.0, 80.0, 60.0], [-40.0, -80.0, 60.0],
                     [120.0, 90.0, 30.0], [120.0, -90.0, 30.0], [100.0, 60.0, 30.0], [100.0, -60.0, 30.0]])
    extra = rng.uniform([-100, -150, 20], [100, 150, 1100], size=(n_extra, 3))
    cloud = np.vstack([base, extra])
    xyz = np.repeat(cloud[None], n_frames, axis=0).astype(float)
    xyz[:, :, 0] += speed * 1000.0 * t[:, None]
    xyz += rng.normal(0, 0.5, xyz.shape)
    # default labels on the body-like points (y is the left in this lab), so the lab frame can be found from them
    labels = ["l.asis", "r.asis", "l.psis", "r.psis", "l.knee.lat", "r.knee.lat", "l.heel", "r.heel", "l.met5",
              "r.met5", "l.met1", "r.met1"] + [f"mk{i:03d}" for i in range(n_extra)]
    return labels, xyz


def _in_lab(trial):
    """The trial mapped to the internal lab frame from its landmarks (labframe)."""
    lm = resolve_landmarks(trial, allow_missing=REQUIRED_LANDMARKS)
    return to_lab_frame(trial, lm)[0]


def _independent_read(path):
    """Read with the `c3d` package: labels (LABELS + LABELS2...), rate, frames and point arrays."""
    with open(path, "rb") as fh, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reader = c3d.Reader(fh)
        group = reader.get("POINT")
        labels = []
        for name in ["LABELS"] + [f"LABELS{k}" for k in range(2, 10)]:
            param = group.get(name)
            if param is None:
                break
            labels.extend(s.strip() for s in param.string_array)
        frames = [points.copy() for _, points, _ in reader.read_frames()]
        return labels, reader.point_rate, np.stack(frames)


def test_round_trip_matches_independent_reader(tmp_path):
    labels, xyz = _walker()
    xyz[10:14, 3, :] = np.nan  # a short gap, written as invalid
    path = write_c3d(tmp_path / "t.c3d", labels, xyz, 200.0)
    ind_labels, ind_rate, ind_points = _independent_read(path)
    assert ind_labels == labels
    assert ind_rate == pytest.approx(200.0)
    assert ind_points.shape[0] == xyz.shape[0]
    valid = ind_points[:, :, 3] >= 0
    # c3d.org: residual -1 marks invalid points
    assert not valid[10:14, 3].any() and valid[:10, 3].all()
    assert np.allclose(ind_points[valid][:, :3], xyz[valid], atol=1e-3)  # float storage: within 1e-3 mm

    trial = read_c3d(path)
    assert trial.labels == tuple(labels)
    assert trial.rate_hz == 200.0 and trial.n_frames == xyz.shape[0]
    assert np.isnan(trial.xyz[10:14, 3]).all()
    assert np.allclose(trial.xyz[valid], xyz[valid] / 1000.0, atol=1e-6)  # read in the file's axes
    lab = _in_lab(trial).lab  # Z-up, +x travel: identity mapping
    assert lab.vertical_axis == "+z" and lab.travel_axis == "+x" and lab.overground
    np.testing.assert_array_equal(lab.file_to_lab, np.eye(3))


def test_more_than_255_labels_read_from_labels2(tmp_path):
    labels, xyz = _walker(n_frames=20, n_extra=288)
    assert len(labels) == 300
    path = write_c3d(tmp_path / "many.c3d", labels, xyz, 200.0)
    ind_labels, _, _ = _independent_read(path)
    assert len(ind_labels) == 300  # independent reader sees LABELS + LABELS2 too
    assert read_c3d(path).labels == tuple(labels)


@pytest.mark.parametrize("unit,factor", [("mm", 1.0), ("cm", 0.1), ("m", 0.001)])
def test_units_give_same_metres(tmp_path, unit, factor):
    labels, xyz = _walker()
    ref = read_c3d(write_c3d(tmp_path / "mm.c3d", labels, xyz, 200.0)).xyz
    other = read_c3d(write_c3d(tmp_path / f"{unit}.c3d", labels, xyz * factor, 200.0, units=unit)).xyz
    assert np.allclose(other, ref, atol=1e-6)


@pytest.mark.parametrize("mapping", ["yup", "yup_reverse", "zup_reverse"])
def test_axes_and_travel_direction_give_same_internal_frame(tmp_path, mapping):
    labels, xyz = _walker()
    ref = _in_lab(read_c3d(write_c3d(tmp_path / "ref.c3d", labels, xyz, 200.0))).xyz
    x, y, z = xyz[..., 0], xyz[..., 1], xyz[..., 2]
    if mapping == "yup":  # right-handed Y-up lab: file x = forward, file y = up, file z = right
        file_xyz = np.stack([x, z, -y], axis=-1)
    elif mapping == "yup_reverse":  # Y-up, running toward file -x
        file_xyz = np.stack([-x, z, y], axis=-1)
    else:  # Z-up, running toward file -x
        file_xyz = np.stack([-x, -y, z], axis=-1)
    got = _in_lab(read_c3d(write_c3d(tmp_path / f"{mapping}.c3d", labels, file_xyz, 200.0)))
    assert np.allclose(np.linalg.det(got.lab.file_to_lab), 1.0)
    # Same internal coordinates up to where the origin sits along travel (a reflected x origin).
    shift = np.nanmean(got.xyz - ref, axis=(0, 1))
    assert np.allclose(shift[1:], 0.0, atol=1e-6)
    assert np.allclose(got.xyz - shift, ref, atol=1e-6)


def test_events_and_subject_read(tmp_path):
    labels, xyz = _walker()
    events = [("Foot Strike", "Right", 0.104), ("Foot Off", "Right", 0.212), ("Initial Contact", "Left", 0.31),
              ("toe-off", "left", 0.41), ("Custom mark", "General", 0.5)]
    path = write_c3d(tmp_path / "ev.c3d", labels, xyz, 200.0, events=events,
                     subject={"name": "XX01", "body_mass_kg": 72.5})
    trial = read_c3d(path)
    kinds = [(e.kind, e.side) for e in trial.events]
    assert kinds == [("foot_strike", "right"), ("toe_off", "right"), ("foot_strike", "left"), ("toe_off", "left"),
                     ("custom mark", "general")]
    assert [e.time_s for e in trial.events] == pytest.approx([0.104, 0.212, 0.31, 0.41, 0.5], abs=1e-6)
    assert trial.meta["subject"] == "XX01"
    assert trial.meta["body_mass_kg"] == pytest.approx(72.5)


@pytest.mark.parametrize("content,code", [(b"", "empty_file"), (b"hello world" * 10, "truncated"),
                                          (b"\x02\x00" + bytes(2000), "not_c3d")])
def test_bad_files_raise_one_line_errors(tmp_path, content, code):
    path = tmp_path / "bad.c3d"
    path.write_bytes(content)
    with pytest.raises(FileFormatError) as info:
        read_c3d(path)
    assert info.value.code == code
    assert "bad.c3d" in str(info.value) and "\n" not in str(info.value)


def test_cut_short_file_reads_its_whole_frames_like_both_readers(tmp_path):
    # A copy cut short in the data block: ezc3d and the `c3d` package both read the whole frames that are there, so
    # we do too (formerly refused as truncated: our bug, issue 13) and say how many frames the header promised.
    import ezc3d

    labels, xyz = _walker()
    path = write_c3d(tmp_path / "full.c3d", labels, xyz, 200.0)
    data = path.read_bytes()
    cut = tmp_path / "cut.c3d"
    cut.write_bytes(data[: len(data) - 4000])
    trial = read_c3d(cut)
    n_ezc3d = ezc3d.c3d(str(cut), extract_forceplat_data=False)["data"]["points"].shape[2]
    _, _, independent = _independent_read(cut)
    assert trial.n_frames == n_ezc3d == len(independent) < xyz.shape[0]
    assert trial.meta["frames_promised"] == xyz.shape[0]
    np.testing.assert_allclose(trial.xyz, xyz[:trial.n_frames] / 1000.0, atol=1e-6)
    head = tmp_path / "head.c3d"  # cut before the first whole frame: nothing to read
    head.write_bytes(data[: 512 * (data[16] - 1) + 10])
    with pytest.raises(FileFormatError) as info:
        check_c3d_header(head)
    assert info.value.code == "truncated" and "cut short" in info.value.message


# ------------------------------------------------------------------ numpy reader against the native reader (ezc3d)
def _both_readers(path, monkeypatch):
    import hamstride.c3d.reader as hio  # the module whose globals the reader looks up

    fast = read_c3d(path)
    with monkeypatch.context() as m:
        m.setattr(hio, "NUMPY_READER", False)
        native = read_c3d(path)
    return fast, native


def _assert_same_trial(fast, native):
    assert fast.labels == native.labels
    assert fast.rate_hz == native.rate_hz and fast.first_frame == native.first_frame
    assert fast.units_in_file == native.units_in_file and fast.meta == native.meta
    assert fast.events == native.events
    assert fast.lab is None and native.lab is None  # both in file axes (the lab frame comes from the landmarks)
    np.testing.assert_array_equal(fast.xyz, native.xyz)  # NaN in the same places, values bit for bit


def test_numpy_reader_equals_native_reader_on_the_demo_squad(monkeypatch):
    from pathlib import Path

    files = sorted((Path(__file__).resolve().parents[1] / "demo_trials").rglob("*.c3d"))
    assert len(files) >= 20
    for path in files:
        _assert_same_trial(*_both_readers(path, monkeypatch))


@pytest.mark.parametrize("analog", [False, True])
@pytest.mark.parametrize("scale", [0.05, -0.05])  # positive: 16-bit integers x scale; negative: floats (c3d.org)
def test_numpy_reader_equals_native_and_independent_readers_on_integer_and_float_files(tmp_path, monkeypatch, scale,
                                                                                         analog):
    # Written by the independent `c3d` package, optionally with 6 analog channels at 4 samples per frame interleaved
    # after the points, with invalid points (residual -1) and a point at exactly zero (also invalid for us).
    labels, xyz = _walker(n_frames=120, n_extra=3, seed=4)
    rng = np.random.default_rng(1)
    writer = c3d.Writer(point_rate=200.0, analog_rate=800.0 if analog else 0.0, point_scale=scale)
    frames = []
    for f in range(xyz.shape[0]):
        points = np.zeros((xyz.shape[1], 5))
        points[:, :3] = xyz[f]
        if 30 <= f < 35:
            points[2, 3] = -1.0
        if f == 50:
            points[5, :3] = 0.0
        frames.append((points, rng.normal(0.0, 100.0, (6, 4)) if analog else np.zeros((0, 0))))
    writer.add_frames(frames)
    writer.set_point_labels(labels)
    if analog:
        writer.set_analog_labels([f"ch{i}" for i in range(6)])
    path = tmp_path / "written_by_c3d.c3d"
    with open(path, "wb") as fh, warnings.catch_warnings():
        warnings.simplefilter("ignore")  # "no analog data"
        writer.write(fh)
    if analog:  # ezc3d 1.5-1.7 crash on these files (a segmentation fault): compare with the `c3d` reader only
        fast = read_c3d(path)
    else:
        fast, native = _both_readers(path, monkeypatch)
        _assert_same_trial(fast, native)
    assert np.isnan(fast.xyz[30:35, 2]).all() and np.isnan(fast.xyz[50, 5]).all()
    _, _, independent = _independent_read(path)
    back = fast.xyz  # read in the file's own axes
    read = ~np.isnan(back).any(axis=2)
    assert np.array_equal(read, (independent[:, :, 3] >= 0) & ~(independent[:, :, :3] == 0).all(axis=2))
    # the `c3d` package returns float32 (and scales integers in float32): agreement to float32 rounding (2^-23)
    np.testing.assert_allclose(back[read], independent[read][:, :3] / 1000.0, rtol=2.0 ** -22, atol=1e-9)
    if scale > 0:  # integer storage: coordinates are multiples of the scale as stored (float32 0.05 mm)
        steps = back[read] * 1000.0 / float(np.float32(scale))
        np.testing.assert_allclose(steps, np.round(steps), rtol=0, atol=1e-6)


def test_numpy_reader_reads_the_header_event_table_like_the_native_reader(tmp_path, monkeypatch):
    # c3d.org header: word 150 = 12345 (four-character labels), word 151 = number of events, event times as floats
    # from byte 304, labels of four characters from byte 396. A file whose only events are in that table.
    import struct

    labels, xyz = _walker()
    path = write_c3d(tmp_path / "plain.c3d", labels, xyz, 200.0)
    data = bytearray(path.read_bytes())
    data[298:302] = struct.pack("<2H", 12345, 2)
    data[304:312] = struct.pack("<2f", 0.25, 0.5)
    data[396:404] = b"RFS LTO "
    crafted = tmp_path / "header_events.c3d"
    crafted.write_bytes(bytes(data))
    fast, native = _both_readers(crafted, monkeypatch)
    _assert_same_trial(fast, native)
    assert [(e.label, e.time_s) for e in fast.events] == [("RFS", 0.25), ("LTO", 0.5)]


def test_point_masks_equal_numpy_reductions_over_xyz():
    # io.all_xyz / any_xyz / finite_points replace numpy's all/any over a last axis of length 3 (reference: numpy);
    # the absurd-coordinate rule |x| >= limit must equal isinf | (isfinite & |x| >= limit), NaN being a gap.
    from hamstride import io

    rng = np.random.default_rng(8)
    x = rng.normal(scale=1e4, size=(40, 9, 3))
    for value, share in ((np.nan, 0.1), (np.inf, 0.03), (-np.inf, 0.03), (2e4, 0.05), (0.0, 0.2)):
        x[rng.random(x.shape) < share] = value
    np.testing.assert_array_equal(io.finite_points(x), np.isfinite(x).all(axis=-1))
    np.testing.assert_array_equal(io.all_xyz(x == 0.0), np.all(x == 0.0, axis=-1))
    limit = io.MAX_ABS_COORDINATE_M * 1e-3  # so that finite values beyond it occur
    with np.errstate(invalid="ignore"):
        expected = np.any(np.isinf(x) | (np.isfinite(x) & (np.abs(x) >= limit)), axis=-1)
        got = io.any_xyz(np.abs(x) >= limit)
    assert expected.any() and not expected.all()
    np.testing.assert_array_equal(got, expected)


def test_row_vector_helpers_equal_numpy():
    # io.dot_rows / norm_rows / cross_rows are numpy's sum, linalg.norm and cross written out by component
    # (reference: numpy), on [F, 3] and [F, M, 3] arrays.
    from hamstride import io

    rng = np.random.default_rng(12)
    for shape in ((50, 3), (20, 7, 3)):
        a, b = rng.normal(size=shape), rng.normal(size=shape)
        np.testing.assert_allclose(io.dot_rows(a, b), np.sum(a * b, axis=-1), rtol=1e-15, atol=1e-15)
        np.testing.assert_allclose(io.norm_rows(a), np.linalg.norm(a, axis=-1), rtol=1e-15, atol=0)
        np.testing.assert_allclose(io.cross_rows(a, b), np.cross(a, b), rtol=1e-15, atol=1e-15)
