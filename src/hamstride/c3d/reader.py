"""Read C3D marker trials: Intel and MIPS point data with numpy straight from the data block after the screening
of :mod:`.screen`; DEC files and files with rotation blocks through ezc3d. Parameter text is stripped of the spaces
and NUL bytes writers pad it with (:func:`clean_text`). C3D facts from the c3d.org user guide: POINT:LABELS holds at
most 255 labels and continues in LABELS2, LABELS3, ...; POINT:UNITS documents the unit (default mm); a negative
residual marks an invalid point; EVENT:TIMES holds (minutes, seconds) pairs.
"""
from __future__ import annotations

import math
from pathlib import Path
from typing import Mapping

import numpy as np

from ..errors import FileFormatError
from ..numerics import all_xyz, any_xyz, finite_points
from .screen import C3DLayout, _param_numbers, _param_strings, check_c3d_header
from .trial import _FOOT_STRIKE_WORDS, _TOE_OFF_WORDS, TEXT_PADDING, UNIT_TO_METRES, C3DEvent, MarkerTrial, clean_text

__all__ = ["read_c3d", "read_c3d_isolated", "clean_text", "NUMPY_READER", "MAX_ABS_COORDINATE_M", "TEXT_PADDING"]

MAX_ABS_COORDINATE_M = 1.0e4


#: Read Intel-format point data straight from the data block with numpy (bit-identical to ezc3d and about six times
#: faster: 1.3 ms against 8 ms for a 2 s demo trial; tests compare the two on float and integer files, with analog
#: channels and invalid points). DEC files and files with ezc3d rotation blocks go to ezc3d. MIPS (big-endian) files
#: are always read with numpy: ezc3d 1.7 does not read them (tests compare with the `c3d` package).
NUMPY_READER = True


def read_c3d(path: str | Path) -> MarkerTrial:
    """Read a C3D file into a :class:`MarkerTrial` (metres, file axes, invalid points NaN).

    The file is first checked by :func:`check_c3d_header` in our own code, so only files whose blocks, counts and
    sizes agree are read. Intel and MIPS files are then read with numpy, DEC files by the native reader (ezc3d). Every
    problem is a FileFormatError; nothing else escapes. Points with infinite or absurd coordinates (beyond 10 km) are
    marked invalid and counted in ``meta['bad_coordinates']``; NaN coordinates are gaps.
    """
    path = Path(path)
    layout = check_c3d_header(path)
    name = path.name
    try:
        if layout.processor == 86 or (NUMPY_READER and layout.processor == 84 and not layout.rotation_data):
            file_xyz, invalid = _read_points(path, layout)
            return _assemble_trial(path, layout.labels, file_xyz, invalid, layout.units, layout.rate_hz,
                                   layout.first_frame, _parameter_values(layout.parameters, layout.processor),
                                   layout.header_events, layout.frames_promised)
        import ezc3d

        try:
            c = ezc3d.c3d(str(path), extract_forceplat_data=False)
        except Exception as exc:  # ezc3d raises RuntimeError/IOError with C++ messages
            reason = str(exc).split("If you want to ignore")[0].strip().rstrip(".")[:120]
            raise FileFormatError(f"the C3D reader could not parse the file ({reason}); re-export it from the "
                                  "capture software", trial=name, code="bad_file") from None
        return _trial_from_ezc3d(c, path, layout)
    except FileFormatError:
        raise
    except (KeyError, IndexError, TypeError, ValueError, OverflowError, AttributeError) as exc:
        raise FileFormatError(f"the file's contents are inconsistent ({type(exc).__name__}: {str(exc)[:80]}); "
                              "re-export it from the capture software", trial=name, code="bad_file") from None


def _read_points(path: Path, layout: C3DLayout) -> tuple[np.ndarray, np.ndarray]:
    """Coordinates [frame, marker, 3] in file units and the invalid flag [frame, marker] from an Intel-format data
    block (c3d.org): each frame holds x, y, z and a residual word per point (floats, or 16-bit integers times
    POINT:SCALE), then the analog samples; a negative residual word marks an invalid point."""
    word = np.dtype(("f4" if layout.float_data else "i2")).newbyteorder(">" if layout.processor == 86 else "<")
    width = 4 * layout.n_points + layout.n_analog_per_frame
    count = layout.n_frames * width
    try:
        with open(path, "rb") as fh:
            fh.seek(512 * (layout.data_start_block - 1))
            block = np.fromfile(fh, dtype=word, count=count)
    except OSError as exc:
        raise FileFormatError(f"cannot read the file ({exc.strerror})", trial=path.name, code="unreadable") from None
    if block.size != count:  # the file changed since its size was checked
        raise FileFormatError("the file holds fewer frames than its header promises; it was cut short", trial=path.name,
                              code="truncated")
    points = block.reshape(layout.n_frames, width)[:, :4 * layout.n_points].reshape(layout.n_frames, -1, 4)
    xyz = points[..., :3].astype(float)
    if not layout.float_data:
        xyz *= layout.point_scale
    return xyz, points[..., 3] < 0


def _parameter_values(groups: Mapping[str, Mapping[str, tuple]], processor: int) -> dict[str, dict[str, dict]]:
    """Parsed parameter records as {GROUP: {PARAM: {"value": ...}}}, the shape the native reader gives: strings as a
    list, numbers as an array in the parameter's dimensions (first dimension fastest, c3d.org)."""
    out: dict[str, dict[str, dict]] = {}
    for group_name, group in groups.items():
        entries = {}
        for key, record in group.items():
            dtype, dims, _ = record
            if dtype == -1:
                value = _param_strings(record)
            else:
                value = _param_numbers(record, processor)
                if len(dims) > 1 and value.size == math.prod(dims):
                    value = value.reshape(dims, order="F")
            entries[key] = {"value": value}
        out[group_name] = entries
    return out


def _trial_from_ezc3d(c, path: Path, layout: C3DLayout) -> MarkerTrial:
    name = path.name
    params = c["parameters"]
    point = params["POINT"]
    raw = np.asarray(c["data"]["points"], dtype=float)  # [4, marker, frame]
    if raw.ndim != 3 or raw.shape[1] != layout.n_points or raw.shape[2] == 0:
        raise FileFormatError(f"the reader found {raw.shape[1:] if raw.ndim == 3 else raw.shape} (markers, frames) "
                              f"but the header says ({layout.n_points}, {layout.n_frames}); the file is corrupt",
                              trial=name, code="bad_file")
    n_markers = raw.shape[1]
    labels = tuple(_continued_strings(point, "LABELS")[:n_markers])
    if len(labels) < n_markers:
        labels = labels + tuple(f"unlabelled_{i + 1}" for i in range(len(labels), n_markers))
    units = clean_text(_first(point.get("UNITS", {}).get("value", ["mm"]), "mm")).lower() or "mm"
    rate = float(_first(point.get("RATE", {}).get("value", [0.0]), 0.0) or c["header"]["points"]["frame_rate"])
    residuals = np.asarray(c["data"]["meta_points"]["residuals"], dtype=float)[0].T  # [frame, marker]
    header = c["header"].get("events", {})
    header_events = tuple(zip(header.get("events_time", ()), header.get("events_label", ())))
    first_frame = int(c["header"]["points"]["first_frame"]) + 1  # ezc3d reports it 0-based
    return _assemble_trial(path, labels, raw[:3].transpose(2, 1, 0), residuals < 0, units, rate, first_frame, params,
                           header_events, layout.frames_promised)


def _assemble_trial(path: Path, labels: tuple[str, ...], file_xyz: np.ndarray, invalid: np.ndarray, units: str,
                    rate: float, first_frame: int, params: Mapping, header_events,
                    frames_promised: int = 0) -> MarkerTrial:
    """MarkerTrial from what either reader found: coordinates [frame, marker, 3] in file units and file axes."""
    name = path.name
    if units not in UNIT_TO_METRES:
        raise FileFormatError(f"POINT:UNITS is '{units}'; expected mm, cm or m. Fix the unit in the capture software "
                              "and re-export", trial=name, code="bad_units")
    if not np.isfinite(rate) or rate <= 0:
        raise FileFormatError(f"POINT:RATE is {rate}; it must be positive", trial=name, code="bad_rate")
    with np.errstate(all="ignore"):
        xyz = file_xyz * UNIT_TO_METRES[units]
        flagged = invalid | all_xyz(file_xyz == 0.0)
        # NaN is how ezc3d returns points the file marks invalid, and how several writers (ezc3d among them) store
        # gaps in float files: a gap, not corruption. Infinite or absurdly far coordinates are corruption
        # (|inf| is beyond the limit too; NaN compares False).
        absurd = any_xyz(np.abs(xyz) >= MAX_ABS_COORDINATE_M)
    xyz[flagged | absurd | ~finite_points(xyz)] = np.nan
    meta = _read_subject(params)
    meta["bad_coordinates"] = int(np.sum(absurd & ~flagged))
    meta["force_platforms"] = int(_first((params.get("FORCE_PLATFORM") or {}).get("USED", {}).get("value", [0]), 0) or 0)
    if frames_promised > xyz.shape[0]:  # the file was cut short: its whole frames are read (as ezc3d and `c3d` do)
        meta["frames_promised"] = int(frames_promised)
    events = _read_events(params, header_events, first_frame, rate)
    return MarkerTrial(path=str(path), labels=labels, xyz=xyz, rate_hz=rate, first_frame=first_frame,
                       events=events, meta=meta, units_in_file=units)


def read_c3d_isolated(path: str | Path) -> MarkerTrial:
    """:func:`read_c3d` in a child process, so a crash of the native reader becomes a FileFormatError.

    For single-trial commands; squad runs get the same protection from their worker pool.
    """
    import concurrent.futures as cf

    check_c3d_header(path)  # the common problems are found here, without starting a process
    with cf.ProcessPoolExecutor(max_workers=1) as pool:
        try:
            return pool.submit(read_c3d, path).result()
        except cf.process.BrokenProcessPool:
            raise FileFormatError("the C3D reader crashed on this file; it is probably corrupt; re-export it from "
                                  "the capture software", trial=Path(path).name, code="reader_crash") from None


#: What writers pad parameter text with: spaces (c3d.org) and, in some capture systems, NUL bytes (C strings).
def _first(values, default):
    try:
        return values[0] if len(values) else default
    except TypeError:
        return values


def _continued_strings(group: Mapping, name: str) -> list[str]:
    """NAME, NAME2, NAME3, ... read as one list (c3d.org: more than 255 labels continue in LABELS2, ...)."""
    out: list[str] = []
    key, k = name, 1
    while key in group:
        out.extend(clean_text(v) for v in group[key]["value"])
        k += 1
        key = f"{name}{k}"
    return out


def _event_kind(label: str) -> str:
    text = label.strip().lower().replace("-", " ")
    if any(w in text for w in _FOOT_STRIKE_WORDS):
        return "foot_strike"
    if any(w in text for w in _TOE_OFF_WORDS):
        return "toe_off"
    return text


def _event_side(context: str) -> str:
    text = context.strip().lower()
    if text.startswith("r"):
        return "right"
    if text.startswith("l"):
        return "left"
    return "general"


def _read_events(params: Mapping, header_events, first_frame: int, rate: float) -> tuple[C3DEvent, ...]:
    """Events from the EVENT group (preferred) and the header's event table ((time s, label) pairs); times relative
    to the first frame."""
    offset = (first_frame - 1) / rate
    events: list[C3DEvent] = []
    group = params.get("EVENT")
    if group and "TIMES" in group and int(_first(group.get("USED", {}).get("value", [0]), 0)) > 0:
        times = np.asarray(group["TIMES"]["value"], dtype=np.float64)
        used = int(_first(group["USED"]["value"], 0))
        if times.ndim == 2 and times.shape[0] == 2:
            seconds = times[0, :used] * 60.0 + times[1, :used]
        else:
            seconds = times.reshape(-1)[:used]
        used = min(used, len(seconds))  # EVENT:USED larger than the times stored: read the events that exist
        labels = [clean_text(v) for v in group.get("LABELS", {}).get("value", [])] + [""] * used
        contexts = [clean_text(v) for v in group.get("CONTEXTS", {}).get("value", [])] + [""] * used
        for i in range(used):
            events.append(C3DEvent(_event_kind(labels[i]), _event_side(contexts[i]), float(seconds[i] - offset),
                                   labels[i].strip()))
    if not events:
        for t, label in header_events:
            label = clean_text(label)
            if label:
                side = _event_side(label) if label.strip().lower()[:1] in "lr" and " " in label else "general"
                events.append(C3DEvent(_event_kind(label), side, float(t - offset), label.strip()))
    return tuple(sorted(events, key=lambda e: e.time_s))


def _read_subject(params: Mapping) -> dict[str, object]:
    meta: dict[str, object] = {}
    subjects = params.get("SUBJECTS")
    if subjects and "NAMES" in subjects:
        names = [clean_text(n) for n in subjects["NAMES"]["value"] if clean_text(n)]
        if names:
            meta["subject"] = names[0]
    for group_name in ("SUBJECTS", "PROCESSING", "SUBJECT"):
        group = params.get(group_name) or {}
        for key, entry in group.items():
            if key.startswith("__") or not isinstance(entry, Mapping):
                continue
            low = key.lower()
            if "mass" in low or "weight" in low:
                try:
                    value = float(_first(entry["value"], np.nan))
                except (TypeError, ValueError):
                    continue
                if np.isfinite(value) and value > 0:
                    meta.setdefault("body_mass_kg", value)
            elif "height" in low:
                try:
                    value = float(_first(entry["value"], np.nan))
                except (TypeError, ValueError):
                    continue
                if np.isfinite(value) and value > 0:
                    meta.setdefault("height_m", value / 1000.0 if value > 3.0 else value)
    return meta
