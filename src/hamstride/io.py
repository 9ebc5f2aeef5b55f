"""Read and write C3D marker trials.

Reading gives a frozen :class:`MarkerTrial` in the file's own axes, metres, invalid points as NaN; the internal lab
frame (x forward, y left, z up) is found from the resolved landmarks afterwards (:mod:`hamstride.labframe`).
Text read from parameters is stripped of the spaces and NUL bytes writers pad it with (:func:`clean_text`).

C3D facts used here come from the c3d.org user guide: POINT:LABELS holds at most 255 labels and continues in
LABELS2, LABELS3, ...; POINT:UNITS documents the unit (default mm); a negative residual marks an invalid point;
EVENT:TIMES holds (minutes, seconds) pairs.
"""
from __future__ import annotations

import math
import contextlib
import os
import re
import struct
import tempfile
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Iterable, Mapping, Sequence

import numpy as np

from .atomic import atomic_open, atomic_path, atomic_write_bytes, atomic_write_text, safe_name  # noqa: F401
from .errors import FileFormatError
from .numerics import all_xyz, any_xyz, cross_rows, dot_rows, finite_points, norm_rows  # noqa: F401

if TYPE_CHECKING:
    from .labframe import LabFrame

UNIT_TO_METRES = {"mm": 1e-3, "cm": 1e-2, "m": 1.0, "millimeters": 1e-3, "millimetres": 1e-3, "meters": 1.0, "metres": 1.0}

_FOOT_STRIKE_WORDS = ("foot strike", "footstrike", "foot_strike", "initial contact", "foot contact", "heel strike",
                      "touchdown", "touch down")
_TOE_OFF_WORDS = ("foot off", "footoff", "foot_off", "toe off", "toeoff", "toe_off", "final contact", "take off",
                  "takeoff")


@dataclass(frozen=True)
class C3DEvent:
    """One event from the file: ``kind`` is 'foot_strike', 'toe_off' or the file's own label (lower case)."""

    kind: str
    side: str  # 'left', 'right' or 'general'
    time_s: float  # from the first frame = 0 s
    label: str = ""


@dataclass(frozen=True)
class MarkerTrial:
    """A marker trial in the internal lab frame, metres, NaN where the file marks a point invalid."""

    path: str
    labels: tuple[str, ...]
    xyz: np.ndarray  # [frame, marker, 3]
    rate_hz: float
    first_frame: int  # 1-based frame number of the first frame in the original capture
    events: tuple[C3DEvent, ...]
    meta: Mapping[str, object] = field(default_factory=dict)
    units_in_file: str = "mm"
    lab: "LabFrame | None" = None  # labframe.LabFrame once mapped to the internal lab frame (None: file axes)
    force_plates: tuple = ()  # plates.ForcePlate per FORCE_PLATFORM (plates.attach_force_plates)

    @property
    def name(self) -> str:
        return Path(self.path).stem

    @property
    def n_frames(self) -> int:
        return int(self.xyz.shape[0])

    @property
    def first_frame_time_s(self) -> float:
        return (self.first_frame - 1) / self.rate_hz

    @property
    def time_s(self) -> np.ndarray:
        return np.arange(self.n_frames) / self.rate_hz

    def marker(self, label: str) -> np.ndarray:
        return self.xyz[:, self.labels.index(label), :]


# --------------------------------------------------------------------------------------------------- reading

@dataclass(frozen=True)
class C3DLayout:
    """What a C3D file's header and parameter section say, after checking them against each other and the file size."""

    n_points: int
    n_analog_per_frame: int  # analog samples stored with each 3D frame (channels x samples per frame)
    first_frame: int
    n_frames: int
    rate_hz: float
    float_data: bool  # POINT:SCALE < 0 means IEEE/DEC floats, otherwise scaled 16-bit integers
    parameter_block: int  # 1-based block of the parameter section
    parameter_blocks: int
    data_start_block: int
    processor: int  # 84 Intel, 85 DEC, 86 MIPS (c3d.org)
    labels: tuple[str, ...]
    units: str
    file_size: int
    point_scale: float = 1.0  # POINT:SCALE (header scale when absent); multiplies integer coordinates
    rotation_data: bool = False  # ezc3d's ROTATION blocks follow the points
    header_events: tuple[tuple[float, str], ...] = ()  # the header's event table: (time s, label) x 18
    frames_promised: int = 0  # frames the parameters (or header) promise; n_frames is less when the file is cut short
    parameters: Mapping[str, Mapping[str, tuple]] = field(default_factory=dict, repr=False, compare=False)


_C3D_TYPE_SIZES = {-1: 1, 1: 1, 2: 2, 4: 4}  # c3d.org: parameter data types char, byte, int16, float
_MAX_PARAMETERS = 20000
_MAX_HEADER_BYTES = 512 * (255 + 255)  # parameter section: starts at block <= 255, at most 255 blocks long
# Parameters that hold one number in any C3D (c3d.org); an empty one means the section is corrupt.
_SCALAR_PARAMETERS = frozenset({"USED", "RATE", "DATA_START", "FRAMES", "GEN_SCALE", "RATIO", "SCALE"})  # far above any real file (common practice: a few hundred)


def _dec_float(raw: bytes) -> float:
    """DEC (VAX F) float -> Python float: swap the 16-bit halves, read as IEEE little-endian, divide by 4."""
    return struct.unpack("<f", raw[2:4] + raw[0:2])[0] / 4.0 if len(raw) == 4 else float("nan")


def _parse_parameters(data: bytes, start: int, end: int, processor: int, name: str
                      ) -> tuple[dict[str, dict[str, tuple]], int]:
    """Walk the parameter records between byte ``start`` and ``end`` (c3d.org record layout).

    Record: int8 name length (negative = locked, 0 = end), int8 id (negative = group, positive = parameter of group
    |id|), name, int16 offset to the next record (counted from the offset word; 0 = last); a parameter then holds
    int8 type (-1 char, 1 byte, 2 int16, 4 float), uint8 number of dimensions, the dimensions, the data and a
    description. Returns {GROUP: {PARAM: (type, dims, raw bytes)}} and the byte after the last record; raises
    FileFormatError on any record that leaves the section or overlaps the next one. ``end`` bounds the walk, not the
    block count the parameter section declares: writers that add records (long LABELS, LABELS2, ...) do not always
    update that count, and ezc3d and the `c3d` package read such records too.
    """
    def bad(reason: str, code: str = "bad_parameters") -> FileFormatError:
        return FileFormatError(f"the parameter section is corrupt ({reason}); re-export the file from the capture "
                               "software", trial=name, code=code)

    endian = ">" if processor == 86 else "<"
    group_names: dict[int, str] = {}
    params: list[tuple[int, str, tuple]] = []
    pos = start + 4
    last_end = pos
    for _ in range(_MAX_PARAMETERS):
        if pos + 2 > end:
            if pos >= len(data) or end >= len(data):
                raise bad("it runs past the end of the file", code="truncated")
            raise bad("a record runs past the end of the section")
        n_chars, ident = struct.unpack("bb", data[pos:pos + 2])
        if n_chars == 0:
            break
        n_chars = abs(n_chars)
        name_end = pos + 2 + n_chars
        if name_end + 2 > end:
            raise bad("a record runs past the end of the section",
                      code="truncated" if name_end + 2 > len(data) else "bad_parameters")
        label = clean_text(data[pos + 2:name_end].decode("latin-1")).upper()
        (offset,) = struct.unpack(endian + "h", data[name_end:name_end + 2])
        if offset < 0:
            raise bad(f"record {label!r} points backwards (offset {offset})")
        next_pos = name_end + offset if offset > 0 else None
        body = name_end + 2
        if ident < 0:
            if body + 1 > end:
                raise bad(f"group {label!r} is cut off")
            record_end = body + 1 + data[body]
            if ident in group_names and group_names[ident] != label:
                raise bad(f"two groups share the id {-ident}")
            group_names[ident] = label
        elif ident > 0:
            if body + 2 > end:
                raise bad(f"parameter {label!r} is cut off")
            dtype, n_dims = struct.unpack("bB", data[body:body + 2])
            if dtype not in _C3D_TYPE_SIZES:
                raise bad(f"parameter {label!r} has the unknown data type {dtype}")
            dims = tuple(data[body + 2:body + 2 + n_dims])
            if len(dims) != n_dims:
                raise bad(f"parameter {label!r} is cut off")
            if dtype == -1 and n_dims == 0:  # character data always give the string length first (c3d.org)
                raise bad(f"character parameter {label!r} has no dimensions")
            n_values = math.prod(dims)  # exact integer: 255 dimensions of 255 must not overflow
            data_start = body + 2 + n_dims
            data_end = data_start + _C3D_TYPE_SIZES[dtype] * n_values
            if data_end + 1 > end:
                raise bad(f"parameter {label!r} ({n_dims} dimensions, {n_values} values) runs past the end of the "
                          "section")
            record_end = data_end + 1 + data[data_end]
            params.append((ident, label, (dtype, dims, data[data_start:data_end])))
        else:
            raise bad("a record has the id 0")
        if record_end > end:
            raise bad(f"record {label!r} runs past the end of the section")
        last_end = record_end
        if next_pos is None:
            break
        if next_pos < record_end:
            raise bad(f"record {label!r} points back into itself (offset {offset})")
        if next_pos != record_end:  # records follow each other without gaps (ezc3d rejects anything else too)
            raise bad(f"record {label!r} is {record_end - name_end} bytes long but its offset says {offset}")
        pos = next_pos
    else:
        raise bad(f"more than {_MAX_PARAMETERS} records")
    groups: dict[str, dict[str, tuple]] = {g: {} for g in group_names.values()}
    for ident, label, value in params:
        group = group_names.get(-ident)
        if group is not None:
            groups[group][label] = value
    return groups, last_end


def _param_numbers(value: tuple | None, processor: int) -> np.ndarray:
    """All numbers of an int16/byte/float parameter as float64 (empty when absent or of the wrong type)."""
    if value is None:
        return np.empty(0)
    dtype, _, raw = value
    if dtype == 4:
        if processor == 85:
            return np.array([_dec_float(raw[i:i + 4]) for i in range(0, len(raw) - 3, 4)])
        return np.frombuffer(raw, dtype=(">f4" if processor == 86 else "<f4")).astype(float)
    if dtype == 2:
        return np.frombuffer(raw, dtype=(">i2" if processor == 86 else "<i2")).astype(float)
    if dtype == 1:
        return np.frombuffer(raw, dtype=np.int8).astype(float)
    return np.empty(0)


def _param_strings(value: tuple | None) -> list[str]:
    if value is None or value[0] != -1:
        return []
    _, dims, raw = value
    if len(dims) <= 1:
        return [clean_text(raw.decode("latin-1"))]
    width = dims[0]
    return [clean_text(raw[i:i + width].decode("latin-1")) for i in range(0, len(raw), width)] if width else []


def check_c3d_header(path: str | Path) -> C3DLayout:
    """Screen a C3D file's header and parameters in our own code, before any reader sees it, and lay it out.

    Header (c3d.org): byte 0 = first parameter block (1-based), byte 1 = 0x50; 16-bit words from byte 2: number of
    points, analog samples per frame, first and last frame, max gap; scale (float, negative = float data) at byte 12,
    data start block at byte 16, frame rate (float) at byte 20. The parameter section starts with (reserved, 0x50,
    number of parameter blocks, processor type 84/85/86). Refused: what is not a C3D, parameter records that leave
    the file or overlap (patterns known to crash ezc3d), files without markers (``no_markers``), data that start
    inside the parameter records or beyond the file, POINT:USED against the header, too few labels, rates that are
    not positive, POINT:FRAMES that ezc3d and the `c3d` package would read differently. Not refused (both readers
    read them alike): parameter sections longer than their declared block count, a stale POINT:DATA_START (the
    header's data start is used), a stale header frame count (POINT:FRAMES is used), files cut short in the data
    (their whole frames are read; ``frames_promised`` says how many the file promised).
    Returns the :class:`C3DLayout`; raises FileFormatError (one line naming the trial and what to do) otherwise.
    """
    path = Path(path)
    name = path.name
    try:
        with open(path, "rb") as fh:
            size = os.fstat(fh.fileno()).st_size
            data = fh.read(_MAX_HEADER_BYTES)  # header + the largest possible parameter section, never the data
    except OSError as exc:
        raise FileFormatError(f"cannot open the file ({exc.strerror})", trial=name, code="unreadable") from None
    if size == 0:
        raise FileFormatError("the file is empty (0 bytes); re-export it from the capture software", trial=name,
                              code="empty_file")
    if size < 1024:
        raise FileFormatError(f"the file is only {size} bytes, too short for a C3D (header and parameters need at "
                              "least 1024); it is probably truncated", trial=name, code="truncated")
    if data[1] != 0x50:
        raise FileFormatError("not a C3D file (the header's key byte is not 0x50); check the file type", trial=name,
                              code="not_c3d")
    param_block = data[0]
    if param_block < 2 or 512 * param_block > size:
        where = "the header itself" if param_block < 2 else "outside the file"
        raise FileFormatError(f"the header points to a parameter section at block {param_block}, {where}; the file is "
                              "corrupt or truncated", trial=name, code="bad_header")
    param_start = 512 * (param_block - 1)
    n_param_blocks, processor = data[param_start + 2], data[param_start + 3]
    if processor not in (84, 85, 86):
        raise FileFormatError(f"unknown processor type {processor} at the start of the parameter section (block "
                              f"{param_block}; expected 84/85/86): the header's pointer or the parameters are corrupt",
                              trial=name, code="bad_header")
    endian = ">" if processor == 86 else "<"
    n_points, n_analog, first, last = struct.unpack(endian + "4H", data[2:10])
    data_start = struct.unpack(endian + "H", data[16:18])[0]
    if processor == 85:
        scale, rate = _dec_float(data[12:16]), _dec_float(data[20:24])
    else:
        scale = struct.unpack(endian + "f", data[12:16])[0]
        rate = struct.unpack(endian + "f", data[20:24])[0]
    # The records are walked to their end marker, within the file and the largest section a header can point to:
    # the block count the section declares is often stale (files whose LABELS run into a further block).
    groups, records_end = _parse_parameters(data, param_start, len(data), processor, name)

    def bad(reason: str, code: str = "bad_parameters") -> FileFormatError:
        return FileFormatError(reason + "; re-export the file from the capture software", trial=name, code=code)

    point = groups.get("POINT")
    if n_points == 0 or (point is not None and _param_numbers(point.get("USED"), processor)[:1].tolist() == [0]):
        analog = "" if n_analog == 0 and "ANALOG" not in groups else " (only analog channels such as force plates or EMG)"
        raise FileFormatError(f"the file holds no markers{analog}; export the trial with its labelled markers",
                              trial=name, code="no_markers")
    if point is None:
        raise bad("the parameter section has no POINT group")
    for group_name, group in groups.items():  # the native reader takes the first value of these (ezc3d 1.7 crashes)
        for key in _SCALAR_PARAMETERS.intersection(group):
            dtype, dims, raw = group[key]
            if key == "SCALE" and group_name != "POINT":  # ANALOG:SCALE is one value per channel, may be empty
                continue
            if len(raw) < _C3D_TYPE_SIZES[dtype] or dtype == -1:
                raise bad(f"{group_name}:{key} holds no number")
    used = _param_numbers(point.get("USED"), processor)
    if used.size and int(used[0]) % 65536 != n_points:
        raise bad(f"POINT:USED says {int(used[0])} markers but the header says {n_points}")
    rotation = groups.get("ROTATION", {})  # rotation data (an ezc3d extension) sit after the points, RATIO per frame
    rotation_used = _param_numbers(rotation.get("USED"), processor)
    rotation_ratio = _param_numbers(rotation.get("RATIO"), processor)
    if rotation_ratio.size and not 0 <= rotation_ratio[0] <= 1000:
        raise bad(f"ROTATION:RATIO is {int(rotation_ratio[0])}; the file is corrupt")
    if rotation_used.size and rotation_used[0] != 0:
        rotation_bytes = abs(rotation_used[0]) * max(rotation_ratio[0] if rotation_ratio.size else 1, 1) * 64
        if rotation_used[0] < 0 or rotation_bytes * max(int(last) - int(first) + 1, 1) > size:
            raise bad(f"ROTATION:USED ({int(rotation_used[0])}) promises more rotation data than the file holds")
    analog_rate = _param_numbers(groups.get("ANALOG", {}).get("RATE"), processor)
    if analog_rate.size and not (np.isfinite(analog_rate[0]) and analog_rate[0] >= 0):
        raise bad(f"ANALOG:RATE is {float(analog_rate[0]):g}")
    param_rate = _param_numbers(point.get("RATE"), processor)
    for source, value in (("header", rate), ("POINT:RATE", param_rate[0] if param_rate.size else rate)):
        if not np.isfinite(value) or value <= 0:
            raise FileFormatError(f"the {source} frame rate is {float(value):g}; it must be a positive number", trial=name,
                                  code="bad_rate")
    if param_rate.size:
        rate = float(param_rate[0])
    param_scale = _param_numbers(point.get("SCALE"), processor)
    if param_scale.size and np.isfinite(param_scale[0]) and np.isfinite(scale) and (param_scale[0] < 0) != (scale < 0):
        raise bad(f"the header scale ({scale:g}) and POINT:SCALE ({param_scale[0]:g}) disagree on whether the data "
                  "are floats")
    # Where the data begin: the header's word (ezc3d and the `c3d` package both read from there; POINT:DATA_START,
    # which some writers leave stale, is not used). It must lie beyond the parameter records.
    if data_start < 2 or 512 * (data_start - 1) > size:
        raise FileFormatError("the data section starts beyond the end of the file; the file is truncated", trial=name,
                              code="truncated")
    if 512 * (data_start - 1) < records_end:
        raise FileFormatError(f"the header puts the data at block {data_start}, inside the parameter section (its "
                              f"records run from block {param_block} to block {(records_end - 1) // 512 + 1}); the "
                              "file is corrupt", trial=name, code="bad_header")
    labels: list[str] = []
    key, k = "LABELS", 1
    while key in point:
        labels.extend(_param_strings(point[key]))
        k += 1
        key = f"LABELS{k}"
    if len(labels) < n_points:
        raise bad(f"the file has {n_points} markers but only {len(labels)} labels (POINT:LABELS)", code="bad_labels")
    units = (_param_strings(point.get("UNITS")) or ["mm"])[0].lower() or "mm"
    # Frame count: POINT:FRAMES when it is there (the header's 16-bit last frame overflows and some systems leave it
    # stale), else the header's first/last frame; never more than the data block holds. That is what ezc3d reads;
    # the `c3d` package reads every whole frame to the end of the file, so both agree on these frames.
    header_frames = int(last) - int(first) + 1
    param_frames = _param_numbers(point.get("FRAMES"), processor)
    promised = header_frames
    if param_frames.size and np.isfinite(param_frames[0]):
        frames_said = int(param_frames[0]) % 65536 if point["FRAMES"][0] != 4 else int(min(param_frames[0], 2**31))
        if frames_said > 0:
            promised = frames_said
    if promised <= 0:
        raise FileFormatError(f"the header says first frame {first} and last frame {last}: the trial has no frames; "
                              "re-export the trial with its frames", trial=name, code="no_frames")
    float_data = bool(np.isfinite(scale) and scale < 0)
    frame_bytes = (4 * n_points + n_analog) * (4 if float_data else 2)
    in_file = max(0, size - 512 * (data_start - 1)) // max(frame_bytes, 1)
    if 0 < promised < header_frames <= in_file:  # ezc3d reads POINT:FRAMES, the `c3d` package every frame there
        raise bad(f"POINT:FRAMES says {promised} frames but the header's first/last frame give {header_frames} and the "
                  "file holds them all")
    n_frames = min(promised, in_file)
    if n_frames <= 0:
        raise FileFormatError(f"the header promises {promised} frames but the file holds data for none; it was cut "
                              "short (full disk or interrupted copy?); re-export or copy it again", trial=name,
                              code="truncated")
    point_scale = float(param_scale[0]) if param_scale.size and np.isfinite(param_scale[0]) else float(scale)
    return C3DLayout(n_points=n_points, n_analog_per_frame=n_analog, first_frame=first, n_frames=n_frames,
                     rate_hz=float(rate), float_data=float_data, parameter_block=param_block,
                     parameter_blocks=n_param_blocks, data_start_block=data_start, processor=processor,
                     labels=tuple(labels[:n_points]), units=units, file_size=size, point_scale=point_scale,
                     rotation_data=bool(rotation_used.size and rotation_used[0] != 0),
                     header_events=_header_events(data, processor), parameters=groups, frames_promised=promised)


def _header_events(header: bytes, processor: int) -> tuple[tuple[float, str], ...]:
    """The header's event table (c3d.org): 18 times (float, s) from byte 304 and 18 four-character labels from byte
    396; listed in full, as the native reader lists them."""
    if processor == 85:
        times = [_dec_float(header[304 + 4 * i:308 + 4 * i]) for i in range(18)]
    else:
        times = struct.unpack((">" if processor == 86 else "<") + "18f", header[304:376])
    labels = [header[396 + 4 * i:400 + 4 * i].split(b"\x00")[0].decode("latin-1") for i in range(18)]  # C strings
    return tuple(zip(map(float, times), labels))


# Coordinates further than this from the lab origin are not a marker in a capture volume (common practice).
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
TEXT_PADDING = " \x00"


def clean_text(value: object) -> str:
    """A string read from a C3D parameter without its padding (spaces and NUL bytes at either end)."""
    return str(value).strip(TEXT_PADDING)


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


# --------------------------------------------------------------------------------------------------- writing

def write_c3d(path: str | Path, labels: Sequence[str], xyz: np.ndarray, rate_hz: float, *, units: str = "mm",
              events: Iterable[tuple[str, str, float]] = (), subject: Mapping[str, object] | None = None,
              force_plates: Sequence = (), analog_rate_hz: float = 1000.0) -> Path:
    """Write markers to a C3D file atomically (temporary file, then rename).

    ``xyz`` is [frame, marker, 3] in ``units`` in the file's own axes; NaN points are written as invalid (residual -1).
    ``events`` are (label, context, time_s) with time from the first frame = 0 s. ``subject`` may hold ``name``,
    ``body_mass_kg`` and ``height_m``. ``force_plates`` (plates.add_force_plates) adds type-2 force plates with
    analog channels at ``analog_rate_hz``.
    """
    import ezc3d

    path = Path(path)
    xyz = np.asarray(xyz, dtype=float)
    if xyz.ndim != 3 or xyz.shape[2] != 3 or xyz.shape[1] != len(labels):
        raise ValueError("xyz must be [frame, marker, 3] with one marker per label")
    c = ezc3d.c3d()
    c["parameters"]["POINT"]["RATE"]["value"] = [float(rate_hz)]
    c["parameters"]["POINT"]["LABELS"]["value"] = tuple(labels)
    c["parameters"]["POINT"]["UNITS"]["value"] = [units]
    pts = np.ones((4, xyz.shape[1], xyz.shape[0]))
    pts[:3] = xyz.transpose(2, 1, 0)
    c["data"]["points"] = pts
    for label, context, time_s in events:
        c.add_event(time=[0, float(time_s)], context=str(context), label=str(label))
    if subject:
        if subject.get("name"):
            c.add_parameter("SUBJECTS", "NAMES", [str(subject["name"])])
        if subject.get("body_mass_kg"):
            c.add_parameter("SUBJECTS", "BODY_MASS_KG", [float(subject["body_mass_kg"])])
        if subject.get("height_m"):
            c.add_parameter("SUBJECTS", "HEIGHT_M", [float(subject["height_m"])])
    if force_plates:
        from .plates import add_force_plates

        add_force_plates(c, force_plates, xyz.shape[0], rate_hz, analog_rate_hz, units)
    with atomic_path(path, suffix=".partial.c3d") as tmp:  # ezc3d insists on a .c3d ending
        c.write(str(tmp))
    return path
