"""A byte-level C3D writer for tests, written from the c3d.org user guide only (no hamstride code).

It writes the variants other capture systems produce, which ezc3d's writer and ours never do: DEC and MIPS processor
types, 16-bit integer data, labels continued in LABELS2, parameter sections longer than the header's block count,
header and POINT:FRAMES counts that disagree, data that do not start right after the parameters, strings padded with
NUL bytes, analog-only files. Every file is checked in the tests against ezc3d and the independent `c3d` package.

C3D layout (c3d.org): 512-byte blocks. Header (16-bit words): byte 0 = first parameter block, byte 1 = 0x50, word 2
points, word 3 analog samples per frame (all channels), words 4/5 first/last frame (1-based), word 6 max gap,
words 7-8 scale (float; negative = float data), word 9 data start block, word 10 analog samples per channel per
frame, words 11-12 frame rate (float). Parameter section: 4 bytes (reserved, 0x50, number of blocks, processor
83 + type: 84 Intel, 85 DEC, 86 MIPS), then records: int8 name length, int8 id (negative = group), name, int16
offset to the next record (0 = last), then for a parameter int8 type (-1 char, 1 byte, 2 int16, 4 float), uint8
dimensions, the dimensions, data, uint8 description length, description.
"""
from __future__ import annotations

import math
import struct
from dataclasses import dataclass, field

import numpy as np


def _dec_bytes(values: np.ndarray) -> bytes:
    """IEEE float32 -> DEC (VAX F) bytes: DEC = IEEE x 4 with the 16-bit halves swapped (c3d.org)."""
    raw = (np.asarray(values, dtype="<f4") * np.float32(4.0)).astype("<f4").tobytes()
    out = bytearray(len(raw))
    out[0::4], out[1::4], out[2::4], out[3::4] = raw[2::4], raw[3::4], raw[0::4], raw[1::4]
    return bytes(out)


@dataclass
class Param:
    name: str
    value: object  # str, list[str], list/array of numbers
    kind: str = "auto"  # 'char', 'int', 'float', 'byte' or 'auto'
    width: int | None = None  # character width of a string list (padded)


@dataclass
class Variant:
    labels: list[str]
    xyz: np.ndarray  # [frame, marker, 3] in file units, NaN = invalid
    rate: float = 200.0
    processor: int = 84
    scale: float = -0.1  # negative: float data; positive: int16 x scale
    units: str = "mm"
    pad: bytes = b" "  # padding byte of strings
    label_chunk: int = 255  # labels per LABELS parameter (LABELS, LABELS2, ...)
    declared_param_blocks: int | None = None  # what the parameter header says (None: the true count)
    gap_blocks: int = 0  # empty blocks between the parameters and the data
    header_data_start: int | None = None  # None: the true start
    param_data_start: int | None = None
    header_frames: int | None = None  # last frame in the header = first + this - 1
    param_frames: int | None = None  # POINT:FRAMES
    first_frame: int = 1
    analog: np.ndarray | None = None  # [frame, samples per frame, channels]
    analog_rate: float = 0.0
    events: list[tuple[str, str, float]] = field(default_factory=list)  # (label, context, seconds)
    subject: str | None = None
    extra_groups: dict[str, list[Param]] = field(default_factory=dict)
    analog_group: bool = True  # write an ANALOG group even without channels


class _Enc:
    def __init__(self, processor: int):
        self.p = processor
        self.e = ">" if processor == 86 else "<"

    def h(self, v) -> bytes:
        return struct.pack(self.e + "h", int(v))

    def H(self, v) -> bytes:
        return struct.pack(self.e + "H", int(v))

    def floats(self, values) -> bytes:
        arr = np.asarray(values, dtype=np.float32).reshape(-1)
        if self.p == 85:
            return _dec_bytes(arr)
        return arr.astype(self.e + "f4").tobytes()

    def shorts(self, values) -> bytes:
        return np.asarray(values).astype(self.e + "i2").reshape(-1).tobytes()


def _param_record(enc: _Enc, group_id: int, p: Param, pad: bytes) -> bytes:
    v = p.value
    kind = p.kind
    if kind == "auto":
        if isinstance(v, str) or (isinstance(v, (list, tuple)) and v and isinstance(v[0], str)):
            kind = "char"
        elif isinstance(v, (list, tuple, np.ndarray)) and np.asarray(v).dtype.kind == "f":
            kind = "float"
        elif isinstance(v, float):
            kind = "float"
        else:
            kind = "int"
    if kind == "char":
        if isinstance(v, str):
            raw = v.encode("latin-1")
            width = p.width or len(raw)
            dims = [width]
            data = raw.ljust(width, pad)
        else:
            items = [s.encode("latin-1") for s in v]
            width = p.width or max([len(s) for s in items] + [1])
            dims = [width, len(items)]
            data = b"".join(s.ljust(width, pad) for s in items)
        dtype = -1
    else:
        arr = np.atleast_1d(np.asarray(v))
        dims = list(arr.shape[::-1]) if arr.ndim > 1 else ([] if np.ndim(v) == 0 else [arr.size])
        flat = arr.reshape(-1)  # C order of shape (.., d2, d1): first dimension fastest
        if kind == "float":
            dtype, data = 4, enc.floats(flat)
        elif kind == "byte":
            dtype, data = 1, np.asarray(flat, dtype=np.int8).tobytes()
        else:
            dtype, data = 2, enc.shorts(flat)
    name = p.name.encode("latin-1")
    body = struct.pack("bB", dtype, len(dims)) + bytes(dims) + data + b"\x00"
    return struct.pack("bb", len(name), group_id) + name, body


def _records(enc: _Enc, groups: list[tuple[str, list[Param]]], pad: bytes) -> bytes:
    out = bytearray()
    pieces = []
    for gid, (gname, params) in enumerate(groups, start=1):
        name = gname.encode("latin-1")
        pieces.append((struct.pack("bb", len(name), -gid) + name, b"\x00"))
        for p in params:
            pieces.append(_param_record(enc, gid, p, pad))
    for i, (head, body) in enumerate(pieces):
        offset = 0 if i == len(pieces) - 1 else len(body) + 2
        out += head + enc.h(offset) + body
    return bytes(out)


def c3d_bytes(v: Variant) -> bytes:
    enc = _Enc(v.processor)
    xyz = np.asarray(v.xyz, dtype=float)
    n_frames, n_points = xyz.shape[:2]
    analog = v.analog
    n_ch = analog.shape[2] if analog is not None else 0
    spf = analog.shape[1] if analog is not None else 0
    float_data = v.scale < 0
    groups: list[tuple[str, list[Param]]] = []
    label_params = []
    for k in range(max(1, math.ceil(len(v.labels) / v.label_chunk))):
        chunk = v.labels[k * v.label_chunk:(k + 1) * v.label_chunk]
        width = max([len(s) for s in chunk] + [4]) + 2  # padded like real files
        label_params.append(Param("LABELS" if k == 0 else f"LABELS{k + 1}", list(chunk) or [""], "char", width))
    point = [Param("USED", [n_points], "int"), Param("SCALE", [v.scale], "float"), Param("RATE", [v.rate], "float"),
             Param("DATA_START", [0], "int"), Param("FRAMES", [v.param_frames if v.param_frames is not None
                                                                else n_frames], "int"),
             *label_params,
             Param("DESCRIPTIONS", [f"marker {i}" for i in range(min(n_points, 255))] or [""], "char", 16),
             Param("UNITS", v.units, "char", len(v.units) + 2)]
    groups.append(("POINT", point))
    if analog is not None or v.analog_group:
        groups.append(("ANALOG", [Param("USED", [n_ch], "int"), Param("RATE", [v.analog_rate], "float"),
                                  Param("LABELS", [f"ch{i + 1}" for i in range(n_ch)] or [""], "char", 8),
                                  Param("SCALE", [1.0] * n_ch, "float"), Param("GEN_SCALE", [1.0], "float"),
                                  Param("OFFSET", [0] * n_ch, "int"),
                                  Param("UNITS", ["V"] * n_ch or [""], "char", 4)]))
    if v.events:
        times = np.array([[t // 60, t - 60 * (t // 60)] for _, _, t in v.events], dtype=float)
        groups.append(("EVENT", [Param("USED", [len(v.events)], "int"),
                                 Param("LABELS", [e[0] for e in v.events], "char", 20),
                                 Param("CONTEXTS", [e[1] for e in v.events], "char", 12),
                                 Param("TIMES", times, "float")]))
    if v.subject is not None:
        groups.append(("SUBJECTS", [Param("NAMES", [v.subject], "char", len(v.subject) + 4),
                                    Param("USED", [1], "int")]))
    for gname, params in v.extra_groups.items():
        groups.append((gname, params))

    def build(data_start: int) -> bytes:
        for p in point:
            if p.name == "DATA_START":
                p.value = [v.param_data_start if v.param_data_start is not None else data_start]
        return _records(enc, groups, v.pad)

    records = build(2)
    n_blocks = math.ceil((4 + len(records) + 2) / 512)
    data_start = 2 + n_blocks + v.gap_blocks
    records = build(data_start)
    declared = v.declared_param_blocks if v.declared_param_blocks is not None else n_blocks
    params = bytes([1, 0x50, declared, v.processor]) + records
    params = params.ljust(512 * n_blocks, b"\x00")
    params += bytes(512 * v.gap_blocks)

    header = bytearray(512)
    header[0], header[1] = 2, 0x50
    header_frames = v.header_frames if v.header_frames is not None else n_frames
    header[2:4] = enc.H(n_points)
    header[4:6] = enc.H(n_ch * spf)
    header[6:8] = enc.H(v.first_frame)
    header[8:10] = enc.H(v.first_frame + header_frames - 1)
    header[10:12] = enc.H(10)
    header[12:16] = enc.floats([v.scale])
    header[16:18] = enc.H(v.header_data_start if v.header_data_start is not None else data_start)
    header[18:20] = enc.H(spf)
    header[20:24] = enc.floats([v.rate])

    invalid = ~np.isfinite(xyz).all(axis=2)
    coords = np.where(invalid[..., None], 0.0, xyz)
    resid = np.where(invalid, -1.0, 0.0)
    if float_data:
        frame_pts = np.concatenate([coords, resid[..., None]], axis=2).reshape(n_frames, -1)
        parts = [frame_pts]
        if analog is not None:
            parts.append(analog.reshape(n_frames, -1))
        block = np.concatenate(parts, axis=1)
        data = enc.floats(block)
    else:
        ints = np.round(coords / v.scale)
        frame_pts = np.concatenate([ints, resid[..., None]], axis=2).reshape(n_frames, -1)
        parts = [frame_pts]
        if analog is not None:
            parts.append(np.round(analog).reshape(n_frames, -1))
        data = enc.shorts(np.concatenate(parts, axis=1))
    return bytes(header) + params + data
