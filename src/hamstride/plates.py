"""Force plates: read the C3D FORCE_PLATFORM group through ezc3d, time foot contacts from the vertical force, and
replace the marker events of the contacts a plate saw.

A contact on a plate starts when the vertical force rises through 20 N and ends when it falls back through it
(common practice threshold), with sub-sample linear interpolation at the analog rate. A contact counts for a foot
when that foot is the lowest over the plate during the contact and, overground, when its markers stay inside the
plate's area (a foot half on a plate gives a force curve that starts late or ends early). On an instrumented
treadmill the plates lie under the belt, so every contact is timed this way. Where the plates time a contact, the
marker rule's events for it are kept aside to report the rule's offset from the plates (median and spread, ms):
how a lab calibrates its marker rule.
"""
from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Mapping, Sequence

import numpy as np

from .errors import FileFormatError
from .numerics import SIDES, runs_1d

if TYPE_CHECKING:  # pragma: no cover - typing only
    from .events import GaitEvents
    from .c3d import MarkerTrial
    from .landmarks import Landmarks

CONTACT_THRESHOLD_N = 20.0  # vertical force of a foot contact (common practice)
MIN_PLATE_CONTACT_S = 0.03  # shorter runs above the threshold are knocks, not foot contacts (common practice)
MERGE_PLATE_GAP_S = 0.005  # dips below the threshold shorter than this do not end a contact (design choice)
PLATE_MARGIN_M = 0.01  # foot markers may overhang the plate edge by this much (markers sit on the skin, design choice)
MATCH_S = 0.12  # marker events this far before a plate contact's strike or after its toe-off belong to that contact
FOOT_LANDMARKS = ("heel", "first_metatarsal", "fifth_metatarsal", "toe_tip")


@dataclass(frozen=True)
class ForcePlate:
    """One force platform in the internal lab frame: corners [4, 3] (m) and the vertical force on the body (N,
    upward positive) at the analog rate, sample i at ``i / analog_rate_hz`` s from the first point frame."""

    index: int  # 1-based, as in FORCE_PLATFORM:USED order
    corners_lab_m: np.ndarray
    analog_rate_hz: float
    vertical_force_n: np.ndarray

    @property
    def time_s(self) -> np.ndarray:
        return np.arange(self.vertical_force_n.size) / self.analog_rate_hz


@dataclass(frozen=True)
class PlateContact:
    """A foot contact timed by a plate (s from the first frame; NaN when cut by the start or end of the file)."""

    plate: int
    side: str
    foot_strike_s: float
    toe_off_s: float


@dataclass(frozen=True)
class PlateReport:
    """What the plates did for a trial: contacts used, contacts left out and the marker rule's offset."""

    n_plates: int
    contacts: tuple[PlateContact, ...]
    left_out: tuple[str, ...]
    offsets: Mapping[str, Mapping[str, float]]  # 'foot_strike_ms' / 'toe_off_ms' -> median, p5, p95, n

    def as_info(self) -> dict:
        return {"n_plates": self.n_plates, "n_plate_contacts": len(self.contacts), "left_out": list(self.left_out),
                "marker_offset_from_plates": {k: dict(v) for k, v in self.offsets.items()}}


# --------------------------------------------------------------------------------------------------- reading
def read_force_plates(path: str | Path, file_to_lab: np.ndarray, units: str = "mm") -> tuple[ForcePlate, ...]:
    """Force plates of a C3D file in the internal lab frame (ezc3d's force platform filter; Michaud & Begon 2021,
    doi:10.5281/zenodo.4553333). ``file_to_lab`` is the marker trial's lab rotation and ``units`` its POINT:UNITS (corners use them).

    The vertical force is the plate force along the lab's up axis, sign-free (plates report the force on the plate,
    which points down); analog channels are scaled by ezc3d (ANALOG:SCALE, GEN_SCALE, OFFSET)."""
    import ezc3d

    from .c3d import UNIT_TO_METRES

    try:
        c = ezc3d.c3d(str(path), extract_forceplat_data=True)
    except Exception as exc:  # ezc3d raises RuntimeError with C++ messages
        raise FileFormatError(f"the force plates could not be read ({str(exc)[:100]}); re-export the file with its "
                              "FORCE_PLATFORM parameters", trial=Path(path).name, code="bad_plates") from None
    analog_rate = float(c["parameters"]["ANALOG"]["RATE"]["value"][0])
    scale = UNIT_TO_METRES.get(units, 1e-3)
    rot = np.asarray(file_to_lab, float)
    plates = []
    for k, pf in enumerate(c["data"].get("platform", []), start=1):
        force_lab = rot @ np.asarray(pf["force"], float)  # [3, samples]
        corners = (rot @ (np.asarray(pf["corners"], float) * scale)).T  # [4, 3]
        plates.append(ForcePlate(k, corners, analog_rate, np.abs(force_lab[2])))
    return tuple(plates)


def attach_force_plates(trial: "MarkerTrial") -> "MarkerTrial":
    """The trial with its force plates (``trial.force_plates``) when its FORCE_PLATFORM:USED is above 0; unchanged
    otherwise (no second read of files without plates)."""
    if trial.lab is None or not trial.meta.get("force_platforms"):  # FORCE_PLATFORM:USED, read with the markers
        return trial
    if not Path(trial.path).is_file():  # a trial made in memory: no file to read its plates from
        return trial
    return replace(trial, force_plates=read_force_plates(trial.path, trial.lab.file_to_lab, trial.units_in_file))


def crop_force_plates(plates: Sequence[ForcePlate], start_s: float) -> tuple[ForcePlate, ...]:
    """The plates' samples from ``start_s`` on (time 0 s there), for a trial cropped to its visible window."""
    return tuple(replace(p, vertical_force_n=p.vertical_force_n[int(round(start_s * p.analog_rate_hz)):])
                 for p in plates)


# --------------------------------------------------------------------------------------------------- contacts
def force_contacts(force_n: np.ndarray, rate_hz: float, threshold_n: float = CONTACT_THRESHOLD_N
                   ) -> np.ndarray:
    """[n, 2] (start, end) of each run above ``threshold_n``, s, by linear interpolation between samples; NaN for
    an end the recording cuts (force already above the threshold at the first or last sample)."""
    f = np.asarray(force_n, float)
    above = f > threshold_n
    if not above.any():
        return np.empty((0, 2))
    edges = runs_1d(above)  # sample of first above, sample after last above
    # merge short dips, drop short runs
    merge = int(round(MERGE_PLATE_GAP_S * rate_hz))
    runs = [list(edges[0])]
    for s, e in edges[1:]:
        if s - runs[-1][1] <= merge:
            runs[-1][1] = e
        else:
            runs.append([s, e])
    out = []
    for s, e in runs:
        if (e - s) / rate_hz < MIN_PLATE_CONTACT_S and 0 < s and e < f.size:
            continue
        start = np.nan if s == 0 else s - 1 + (threshold_n - f[s - 1]) / (f[s] - f[s - 1])
        end = np.nan if e == f.size else e - 1 + (f[e - 1] - threshold_n) / (f[e - 1] - f[e])
        out.append((start / rate_hz, end / rate_hz))
    return np.asarray(out, float).reshape(-1, 2)


def _inside(xy: np.ndarray, corners: np.ndarray, margin: float) -> np.ndarray:
    """Points [..., 2] inside the plate's convex quadrilateral grown by ``margin`` (m)."""
    c = corners[:, :2]
    centre = c.mean(axis=0)
    ok = np.ones(xy.shape[:-1], bool)
    for a, b in zip(c, np.roll(c, -1, axis=0)):
        edge = b - a
        normal = np.array([edge[1], -edge[0]]) / np.hypot(*edge)
        if np.dot(centre - a, normal) > 0:
            normal = -normal  # outward
        ok &= (xy - a) @ normal <= margin
    return ok


def _foot_over_plate(lm: "Landmarks", plate: ForcePlate, t0: float, t1: float) -> dict[str, tuple[float, bool]]:
    """Per side: (median height of the foot's lowest marker above its floor level, all foot markers inside the plate
    in every frame of the contact)."""
    rate = lm.rate_hz
    lo, hi = int(np.ceil(t0 * rate)), int(np.floor(t1 * rate)) + 1
    out = {}
    for side in SIDES:
        names = [f"{side}_{m}" for m in FOOT_LANDMARKS if f"{side}_{m}" in lm.points]
        if not names or hi <= lo:
            continue
        xyz = np.stack([np.asarray(lm.points[n], float) for n in names])  # [L, F, 3]
        floor = np.nanpercentile(xyz[:, :, 2], 2.0, axis=1)[:, None]
        seg = xyz[:, lo:hi]
        low = np.nanmedian(np.nanmin(seg[:, :, 2] - floor, axis=0))
        inside = bool(_inside(seg[:, :, :2], plate.corners_lab_m, PLATE_MARGIN_M)[np.isfinite(seg[..., 0])].all())
        out[side] = (float(low), inside)
    return out


def plate_contacts(plates: Sequence[ForcePlate], lm: "Landmarks") -> tuple[list[PlateContact], list[str]]:
    """Foot contacts timed by the plates, each assigned to the foot that is lowest over the plate during it; a contact
    whose foot is not wholly on the plate is left out (described in the second list)."""
    contacts, left_out = [], []
    for plate in plates:
        for t0, t1 in force_contacts(plate.vertical_force_n, plate.analog_rate_hz):
            a = 0.0 if np.isnan(t0) else t0
            b = (lm.n_frames - 1) / lm.rate_hz if np.isnan(t1) else t1
            feet = _foot_over_plate(lm, plate, a, b)
            if not feet:
                continue
            side = min(feet, key=lambda s: feet[s][0])
            if not feet[side][1]:
                left_out.append(f"plate {plate.index}: {side} foot contact at {a:.3f} s not wholly on the plate; "
                                "its events come from the markers")
                continue
            contacts.append(PlateContact(plate.index, side, float(t0), float(t1)))
    return contacts, left_out


def _spread(values: list[float]) -> dict[str, float]:
    x = np.asarray(values, float)
    x = x[np.isfinite(x)]
    if not x.size:
        return {"median": float("nan"), "p5": float("nan"), "p95": float("nan"), "n": 0}
    p5, med, p95 = np.percentile(x, [5, 50, 95])
    return {"median": float(med), "p5": float(p5), "p95": float(p95), "n": int(x.size)}


def apply_plate_contacts(events: "GaitEvents", plates: Sequence[ForcePlate], lm: "Landmarks"
                         ) -> tuple["GaitEvents", PlateReport | None]:
    """Events with the plate-timed contacts in place of the marker (or file) events of the same contacts, the
    source of each foot strike ('plate', 'markers' or 'file') and the marker rule's offset from the plates."""
    base = "file" if events.method == "c3d" else "markers"
    if not plates:
        return replace(events, foot_strike_sources={s: (base,) * len(events.foot_strikes_s[s]) for s in SIDES}), None
    contacts, left_out = plate_contacts(plates, lm)
    fs_out, to_out, src_out = {}, {}, {}
    offsets = {"foot_strike_ms": [], "toe_off_ms": []}
    for side in SIDES:
        fs = list(np.sort(events.foot_strikes_s[side]))
        to = list(np.sort(events.toe_offs_s[side]))
        src = [base] * len(fs)
        marker_fs = np.asarray(events.marker_foot_strikes_s.get(side, ()), float)
        marker_to = np.asarray(events.marker_toe_offs_s.get(side, ()), float)
        for c in (c for c in contacts if c.side == side):
            lo = c.foot_strike_s if np.isfinite(c.foot_strike_s) else -np.inf
            hi = c.toe_off_s if np.isfinite(c.toe_off_s) else np.inf
            own_fs = marker_fs[(marker_fs > lo - MATCH_S) & (marker_fs < hi)]
            own_to = marker_to[(marker_to > lo) & (marker_to < hi + MATCH_S)]
            if np.isfinite(c.foot_strike_s) and own_fs.size:
                offsets["foot_strike_ms"].append(1000.0 * (own_fs[0] - c.foot_strike_s))
            if np.isfinite(c.toe_off_s) and own_to.size:
                offsets["toe_off_ms"].append(1000.0 * (own_to[-1] - c.toe_off_s))
            # the plate's events replace every event of the same contact
            keep = [k for k, x in enumerate(fs) if not lo - MATCH_S < x < hi]
            fs, src = [fs[k] for k in keep], [src[k] for k in keep]
            to = [x for x in to if not lo < x < hi + MATCH_S]
            if np.isfinite(c.foot_strike_s):
                fs.append(c.foot_strike_s)
                src.append("plate")
            if np.isfinite(c.toe_off_s):
                to.append(c.toe_off_s)
        order = np.argsort(fs)
        fs_out[side] = np.asarray(fs, float)[order]
        src_out[side] = tuple(np.asarray(src, object)[order]) if len(fs) else ()
        to_out[side] = np.sort(np.asarray(to, float))
    report = PlateReport(len(plates), tuple(contacts), tuple(left_out),
                         {k: _spread(v) for k, v in offsets.items()})
    new = replace(events, foot_strikes_s=fs_out, toe_offs_s=to_out, foot_strike_sources=src_out,
                  method=events.method if not contacts else events.method + "+plates")
    return new, report


# --------------------------------------------------------------------------------------------------- writing
def add_force_plates(c, plates: Sequence, n_frames: int, rate_hz: float, analog_rate_hz: float, units: str) -> None:
    """Put type-2 force plates into an ezc3d object before it is written (``io.write_c3d``): channels Fx, Fy, Fz, Mx,
    My, Mz per plate (N, N.mm) and the FORCE_PLATFORM group (USED, TYPE, ZERO, CORNERS in ``units``, ORIGIN,
    CHANNEL). Each plate needs ``corners_lab_m`` [4, 3] in the file's axes (ordered +x+y, -x+y, -x-y, +x-y, so the
    plate's z axis points up) and ``vertical_force_n`` at ``analog_rate_hz`` (the upward force on the body; the Fz
    channel holds the force on the plate, which points down)."""
    from .c3d import UNIT_TO_METRES

    ratio = int(round(analog_rate_hz / rate_hz))
    n_an = n_frames * ratio
    channels, names, corners = [], [], []
    for k, p in enumerate(plates, start=1):
        fz = np.zeros(n_an)
        f = np.asarray(p.vertical_force_n, float)[:n_an]
        fz[:f.size] = f
        zero = np.zeros(n_an)
        channels += [zero, zero, -fz, zero, zero, zero]
        names += [f"Fx{k}", f"Fy{k}", f"Fz{k}", f"Mx{k}", f"My{k}", f"Mz{k}"]
        corners.append(np.asarray(p.corners_lab_m, float).T / UNIT_TO_METRES[units])
    n_pl = len(plates)
    c["parameters"]["ANALOG"]["RATE"]["value"] = [float(ratio * rate_hz)]
    c["parameters"]["ANALOG"]["LABELS"]["value"] = tuple(names)
    c["parameters"]["ANALOG"]["UNITS"]["value"] = tuple(["N", "N", "N", "Nmm", "Nmm", "Nmm"] * n_pl)
    c["data"]["analogs"] = np.stack(channels)[None, :, :]
    _int_parameter(c, "FORCE_PLATFORM", "USED", np.array([n_pl]))
    _int_parameter(c, "FORCE_PLATFORM", "TYPE", np.full(n_pl, 2))
    _int_parameter(c, "FORCE_PLATFORM", "ZERO", np.array([1, 0]))
    c.add_parameter("FORCE_PLATFORM", "CORNERS", np.stack(corners, axis=-1))  # [3, 4, plates]
    c.add_parameter("FORCE_PLATFORM", "ORIGIN", np.tile([[0.0], [0.0], [-40.0]], (1, n_pl)))  # [3, plates], invented
    _int_parameter(c, "FORCE_PLATFORM", "CHANNEL", np.arange(6 * n_pl).reshape(n_pl, 6).T + 1)  # [6, plates]


def _int_parameter(c, group: str, name: str, value: np.ndarray) -> None:
    """Add an INT parameter (ezc3d's add_parameter stores integers as floats; FORCE_PLATFORM needs INT)."""
    from ezc3d import ezc3d as swig  # the compiled interface, for the parameter type constant

    c.add_parameter(group, name, np.asarray(value, float))
    c["parameters"][group][name]["type"] = swig.INT
