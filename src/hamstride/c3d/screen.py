"""Screening of a C3D file's header and parameter section before any reader touches the data: refuses only the
patterns known to crash the native reader (ezc3d) or exhaust memory, and follows the readers' rules (the header's
data start, POINT:FRAMES limited to the frames the file holds, parameter records walked to their end marker).
Facts from the c3d.org user guide (header words, parameter records, processor types 84/85/86).
"""
from __future__ import annotations

import math
import os
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping

import numpy as np

from ..errors import FileFormatError
from .trial import clean_text

__all__ = ["C3DLayout", "check_c3d_header"]


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
