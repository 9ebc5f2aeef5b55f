"""A corpus of C3D variants other capture systems write, each read by hamstride, ezc3d and the independent `c3d`
package (issue 13, item 8: files other readers read must not be called corrupt).

The files are written byte by byte from the c3d.org user guide (tests/c3d_bytes.py), not by our writer: DEC and MIPS
processor types, integer and float data, LABELS continued in LABELS2 (and a short LABELS chunk), parameter sections
longer than their declared block count, header and POINT:FRAMES counts that disagree, data that start after unused
blocks or where POINT:DATA_START disagrees with the header, NUL- and space-padded strings, analog channels, and
analog-only files. Expected values come from the generating arrays (truth) and from what both readers return.
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest

from c3d_bytes import Param, Variant, c3d_bytes
from hamstride.errors import FileFormatError
from hamstride.io import read_c3d

c3d = pytest.importorskip("c3d")
ezc3d = pytest.importorskip("ezc3d")

RNG = np.random.default_rng(13)
F, M = 60, 7
XYZ = RNG.uniform(-1500.0, 1500.0, (F, M, 3))  # mm; integer files store multiples of their scale (0.1 mm)
XYZ[5:9, 2] = np.nan  # invalid points (residual -1)
LABELS = [f"mk.{i}" for i in range(M)]
MANY = 300  # more than the 255 labels one LABELS parameter holds (c3d.org)
XYZ_MANY = RNG.uniform(-1000.0, 1000.0, (20, MANY, 3))
LABELS_MANY = [f"pt{i:03d}" for i in range(MANY)]


def _variants() -> dict[str, tuple[Variant, int]]:
    """name -> (variant, frames both readers read)."""
    return {
        "intel_float": (Variant(LABELS, XYZ), F),
        "intel_int": (Variant(LABELS, XYZ, scale=0.1), F),
        "dec_float": (Variant(LABELS, XYZ, processor=85, analog_group=False), F),
        "dec_int": (Variant(LABELS, XYZ, processor=85, analog_group=False, scale=0.1), F),
        "mips_float": (Variant(LABELS, XYZ, processor=86), F),
        "mips_int": (Variant(LABELS, XYZ, processor=86, scale=0.1), F),
        "labels2_300": (Variant(LABELS_MANY, XYZ_MANY), 20),
        "labels3_600": (Variant([f"q{i:03d}" for i in range(600)], RNG.uniform(-900.0, 900.0, (12, 600, 3))), 12),
        "labels2_short_chunk": (Variant(LABELS, XYZ, label_chunk=3), F),
        # LABELS running into a further parameter block: the section's block count says 1, the records need more
        "param_blocks_understated": (Variant(LABELS_MANY[:200], XYZ_MANY[:, :200], declared_param_blocks=1), 20),
        "param_blocks_overstated": (Variant(LABELS, XYZ, declared_param_blocks=4, gap_blocks=3), F),
        "param_blocks_zero": (Variant(LABELS, XYZ, declared_param_blocks=0), F),
        # an active-marker system's stale header frame count: both readers trust POINT:FRAMES and the data there
        "header_frames_1149": (Variant(LABELS, XYZ, header_frames=1149), F),
        "header_frames_fewer": (Variant(LABELS, XYZ, header_frames=29), F),
        "data_after_unused_blocks": (Variant(LABELS, XYZ, gap_blocks=3), F),
        "param_data_start_stale": (Variant(LABELS, XYZ, gap_blocks=3, param_data_start=3), F),
        "nul_padded_strings": (Variant(LABELS, XYZ, pad=b"\x00", events=[("Foot Strike", "Right", 0.05),
                                                                          ("Foot Off", "Left", 0.1)],
                                       subject="VX01"), F),
        "space_padded_strings": (Variant(LABELS, XYZ, pad=b" ", events=[("Foot Strike", "Right", 0.05)],
                                         subject="VX01"), F),
        "with_analog": (Variant(LABELS, XYZ, analog=RNG.normal(0, 50, (F, 4, 6)), analog_rate=800.0), F),
        "first_frame_60000": (Variant(LABELS, XYZ, first_frame=60000), F),
        "units_m_nul": (Variant(LABELS, XYZ / 1000.0, units="m", pad=b"\x00"), F),
    }


VARIANTS = _variants()


def _ezc3d(path):
    c = ezc3d.c3d(str(path), extract_forceplat_data=False)
    pts = np.asarray(c["data"]["points"], float)
    res = np.asarray(c["data"]["meta_points"]["residuals"], float)[0].T
    labels = [s.strip(" \x00") for s in c["parameters"]["POINT"]["LABELS"]["value"]]
    k = 2
    while f"LABELS{k}" in c["parameters"]["POINT"]:
        labels += [s.strip(" \x00") for s in c["parameters"]["POINT"][f"LABELS{k}"]["value"]]
        k += 1
    xyz = pts[:3].transpose(2, 1, 0)
    xyz[res < 0] = np.nan
    return labels, xyz


def _independent(path):
    with open(path, "rb") as fh, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reader = c3d.Reader(fh)
        group = reader.get("POINT")
        labels = None if group is None else []  # the `c3d` package reads no parameters when 0 blocks are declared
        for name in ["LABELS"] + [f"LABELS{k}" for k in range(2, 10)]:
            param = group.get(name) if group is not None else None
            if param is None:
                break
            labels.extend(s.strip(" \x00") for s in param.string_array)
        frames = np.stack([p.copy() for _, p, _ in reader.read_frames()])
    xyz = frames[:, :, :3].astype(float)
    xyz[frames[:, :, 3] < 0] = np.nan
    return labels, xyz


@pytest.mark.parametrize("name", list(VARIANTS))
def test_variant_reads_as_ezc3d_and_c3d_read_it(tmp_path, name):
    variant, frames = VARIANTS[name]
    path = tmp_path / f"{name}.c3d"
    path.write_bytes(c3d_bytes(variant))
    truth = np.asarray(variant.xyz, float)[:frames]
    scale = 1000.0 if variant.units == "m" else 1.0  # file units -> mm
    tol = 0.051 if variant.scale > 0 else 1e-3 * max(1.0, np.nanmax(np.abs(truth)) * 1e-4)  # int: half a 0.1 step
    trial = read_c3d(path)
    assert trial.n_frames == frames
    assert list(trial.labels) == variant.labels
    got_mm = trial.xyz * 1000.0
    np.testing.assert_array_equal(np.isnan(got_mm).any(axis=2), np.isnan(truth).any(axis=2))
    np.testing.assert_allclose(got_mm, truth * scale, atol=tol * scale, equal_nan=True)
    readers = {}
    try:
        readers["ezc3d"] = _ezc3d(path)
    except RuntimeError as exc:  # ezc3d 1.7: "MIPS processor type not supported yet"
        assert variant.processor == 86, exc
    if variant.processor != 85:  # the `c3d` package decodes a DEC zero as -1.7e38 (its analog rate check fails)
        readers["c3d"] = _independent(path)
    assert readers, "at least one outside reader must read every variant"
    for reader, (labels, xyz) in readers.items():
        assert labels is None or labels[:len(variant.labels)] == variant.labels, reader
        assert xyz.shape[0] == frames, reader
        # both outside readers give the same numbers as ours (float32 rounding of the `c3d` package)
        np.testing.assert_allclose(trial.xyz * 1000.0, xyz[:, :len(variant.labels)] * scale, rtol=2.0 ** -21,
                                   atol=1e-6, equal_nan=True, err_msg=reader)
    if variant.events:
        assert [(e.label, e.side) for e in trial.events] == [(lab, ctx.lower()) for lab, ctx, _ in variant.events]
        assert [e.kind for e in trial.events][:1] == ["foot_strike"]
    if variant.subject:
        assert trial.meta["subject"] == variant.subject
    assert trial.units_in_file == variant.units


def test_stale_header_data_start_is_read_where_both_readers_read(tmp_path):
    # Both readers take the header's data start, even when POINT:DATA_START says otherwise; a header that points to
    # unused blocks gives both readers the same empty frames, and us too (no refusal).
    variant = Variant(LABELS, XYZ, gap_blocks=3, header_data_start=3)
    path = tmp_path / "header_start.c3d"
    path.write_bytes(c3d_bytes(variant))
    trial = read_c3d(path)
    _, ez = _ezc3d(path)
    _, ind = _independent(path)
    assert trial.n_frames == ez.shape[0] == ind.shape[0]


def test_frame_counts_the_readers_disagree_on_are_refused_clearly(tmp_path):
    # POINT:FRAMES 29 against a header and a data block of 60: ezc3d reads 29 frames, `c3d` 60. Which is right is
    # not ours to guess: the message names both counts.
    variant = Variant(LABELS, XYZ, param_frames=29)
    path = tmp_path / "frames_disagree.c3d"
    path.write_bytes(c3d_bytes(variant))
    assert _ezc3d(path)[1].shape[0] == 29 and _independent(path)[1].shape[0] == F
    with pytest.raises(FileFormatError) as info:
        read_c3d(path)
    assert info.value.code == "bad_parameters" and "POINT:FRAMES says 29" in info.value.message


@pytest.mark.parametrize("force_platform_group", [False, True])
def test_analog_only_file_says_no_markers(tmp_path, force_platform_group):
    # Force plates / EMG but no markers: both readers read it (0 points); we say "no markers", not corrupt.
    variant = Variant([], np.zeros((F, 0, 3)), analog=RNG.normal(0, 100, (F, 4, 6)), analog_rate=800.0)
    if force_platform_group:  # plates described in the file (c3d.org FORCE_PLATFORM group)
        variant.extra_groups = {"FORCE_PLATFORM": [Param("USED", [1], "int")]}
    path = tmp_path / "analog_only.c3d"
    path.write_bytes(c3d_bytes(variant))
    assert _ezc3d(path)[1].shape[1] == 0 and _independent(path)[1].shape[1] == 0
    with pytest.raises(FileFormatError) as info:
        read_c3d(path)
    assert info.value.code == "no_markers"
    assert "no markers" in info.value.message and "analog" in info.value.message and "corrupt" not in \
        info.value.message


def test_numpy_reader_equals_ezc3d_on_every_intel_variant(tmp_path, monkeypatch):
    # The fast numpy path and ezc3d give bit-identical trials on the Intel variants (reference: ezc3d).
    import hamstride.c3d.reader as hio  # the module whose globals the reader looks up

    for name, (variant, _) in VARIANTS.items():
        if variant.processor != 84:
            continue
        path = tmp_path / f"{name}.c3d"
        path.write_bytes(c3d_bytes(variant))
        fast = read_c3d(path)
        with monkeypatch.context() as m:
            m.setattr(hio, "NUMPY_READER", False)
            native = read_c3d(path)
        assert fast.labels == native.labels and fast.events == native.events and fast.meta == native.meta, name
        np.testing.assert_array_equal(fast.xyz, native.xyz, err_msg=name)
