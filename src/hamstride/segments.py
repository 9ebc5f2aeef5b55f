"""Segment frames and joint centres: pelvis, thigh, shank and foot per side (ISB, Wu et al. 2002).

Conventions (DEVELOPERS.md): axes[f, :, k] is segment axis k (0 = X anterior, 1 = Y proximal, 2 = Z to the athlete's
right on both sides) in the lab, so axes[f] maps segment to lab coordinates.

* Pelvis: origin mid-ASIS, Z left -> right ASIS, X anterior in the ASIS / mid-PSIS plane, Y = Z x X.
* Hip joint centre: Harrington et al. 2007 (J Biomech 40:595) regression in the pelvis frame, full form when leg
  length is known, else the pelvis-width form; Bell et al. 1990 selectable.
* Knee centre = mid-epicondyles; ankle centre = mid-malleoli.
* Thigh: origin hip centre, Y knee -> hip centre, Z right in the hip-centre / epicondyle plane, X = Y x Z.
* Shank: origin knee centre, Y ankle -> knee centre, Z right in the knee-centre / malleoli plane, X = Y x Z.
* Foot: origin ankle centre, X heel -> mid-metatarsals, Y perpendicular to it in the plane of that line and the
  shank Y, Z = X x Y.

Medial markers present only in a static trial are rebuilt in dynamic trials from the segment's other markers by a
least-squares rigid fit (SVD; Soderkvist & Wedin 1993, Meas Sci Technol 4:1353), batched over frames.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

import numpy as np

from .errors import ConfigError, LandmarkError, PlausibilityError
from .numerics import SIDES, cross_rows, dot_rows, finite_points, norm_rows
from .landmarks import Landmarks, plain_name

__all__ = ["HIP_METHODS", "MIN_RIGID_MARKERS", "METATARSAL_HEAD_FRACTION", "SEGMENT_SITES", "REQUIRED_SITES",
           "Frames", "frames_from_y_z", "frames_from_z_x", "frames_from_x_y", "hip_centre_local_mm",
           "hip_joint_centre", "pelvis_frames", "rigid_fit", "RigidSet", "StaticCalibration", "calibrate",
           "reconstruct_missing", "rebuilt_landmarks", "BodyDims", "Body", "check_landmarks", "build_body"]

HIP_METHODS = ("harrington", "harrington_pw", "bell")
MIN_RIGID_MARKERS = 3
# Metatarsal heads sit at about 0.72 of foot length (heel -> longest toe tip) from the heel: from memory; used only
# to estimate the toe tip (de Leva 1996 foot endpoint) when no toe marker exists.
METATARSAL_HEAD_FRACTION = 0.72
# Segment membership of landmark sites, used for rigid-fit reconstruction.
SEGMENT_SITES = {
    "thigh": ("lateral_epicondyle", "medial_epicondyle"),
    "shank": ("lateral_malleolus", "medial_malleolus"),
    "foot": ("heel", "first_metatarsal", "fifth_metatarsal", "toe_tip"),
}
REQUIRED_SITES = ("asis", "psis", "lateral_epicondyle", "medial_epicondyle", "lateral_malleolus", "medial_malleolus",
                  "heel", "first_metatarsal", "fifth_metatarsal")


# --------------------------------------------------------------------------- vector helpers
def _unit(v: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        return v / norm_rows(v)[..., None]


def _reject(v: np.ndarray, axis: np.ndarray) -> np.ndarray:
    """Component of v perpendicular to the unit vector ``axis`` (row-wise)."""
    return v - dot_rows(v, axis)[..., None] * axis


def _stack_axes(x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
    return np.stack([x, y, z], axis=-1)  # columns are the axes


@dataclass(frozen=True)
class Frames:
    """A segment's pose over frames: origin [F, 3] and axes [F, 3, 3] (columns X, Y, Z in lab coordinates)."""

    origin: np.ndarray
    axes: np.ndarray

    @property
    def x(self) -> np.ndarray:
        return self.axes[:, :, 0]

    @property
    def y(self) -> np.ndarray:
        return self.axes[:, :, 1]

    @property
    def z(self) -> np.ndarray:
        return self.axes[:, :, 2]

    def to_local(self, points: np.ndarray) -> np.ndarray:
        """Lab points [F, 3] -> segment coordinates [F, 3]."""
        return np.einsum("fji,fj->fi", self.axes, points - self.origin)

    def to_lab(self, local: np.ndarray) -> np.ndarray:
        """Segment coordinates ([3] fixed, or [F, 3]) -> lab points [F, 3]."""
        local = np.broadcast_to(np.asarray(local, dtype=float), self.origin.shape)
        return self.origin + np.einsum("fij,fj->fi", self.axes, local)


def frames_from_y_z(origin: np.ndarray, y_dir: np.ndarray, z_hint: np.ndarray) -> Frames:
    """Y along ``y_dir``; Z = ``z_hint`` made perpendicular to Y; X = Y x Z (thigh, shank)."""
    y = _unit(y_dir)
    z = _unit(_reject(z_hint, y))
    return Frames(origin, _stack_axes(cross_rows(y, z), y, z))


def frames_from_z_x(origin: np.ndarray, z_dir: np.ndarray, x_hint: np.ndarray) -> Frames:
    """Z along ``z_dir``; X = ``x_hint`` made perpendicular to Z; Y = Z x X (pelvis)."""
    z = _unit(z_dir)
    x = _unit(_reject(x_hint, z))
    return Frames(origin, _stack_axes(x, cross_rows(z, x), z))


def frames_from_x_y(origin: np.ndarray, x_dir: np.ndarray, y_hint: np.ndarray) -> Frames:
    """X along ``x_dir``; Y = ``y_hint`` made perpendicular to X; Z = X x Y (foot)."""
    x = _unit(x_dir)
    y = _unit(_reject(y_hint, x))
    return Frames(origin, _stack_axes(x, y, cross_rows(x, y)))


# --------------------------------------------------------------------------- hip joint centre
def hip_centre_local_mm(pw_mm: float, pd_mm: float, side: str, method: str = "harrington",
                        leg_length_mm: float | None = None) -> tuple[np.ndarray, str]:
    """Hip joint centre in the pelvis frame (mm) and the name of the form used.

    Harrington et al. 2007, J Biomech 40:595 (PW = inter-ASIS, PD = mid-ASIS to mid-PSIS, LL = ASIS to medial
    malleolus, all mm):
      full:    x = -0.24 PD - 9.9,  y = -0.16 PW - 0.04 LL - 7.1,  z = 0.28 PD + 0.16 PW + 7.9
      PW only: x = -0.24 PD - 9.9,  y = -0.30 PW - 10.9,           z = 0.33 PW + 7.3
    Bell et al. 1990: x = -0.19 PW, y = -0.30 PW, z = 0.36 PW.
    z is toward the right, so it is negated on the left.
    """
    if side not in SIDES:
        raise ValueError(f"side must be 'left' or 'right', not {side!r}")
    if method == "harrington" and leg_length_mm is not None:
        xyz, used = (-0.24 * pd_mm - 9.9, -0.16 * pw_mm - 0.04 * leg_length_mm - 7.1,
                     0.28 * pd_mm + 0.16 * pw_mm + 7.9), "harrington_full"
    elif method in ("harrington", "harrington_pw"):
        xyz, used = (-0.24 * pd_mm - 9.9, -0.30 * pw_mm - 10.9, 0.33 * pw_mm + 7.3), "harrington_pw"
    elif method == "bell":
        xyz, used = (-0.19 * pw_mm, -0.30 * pw_mm, 0.36 * pw_mm), "bell"
    else:
        raise ConfigError(f"unknown hip joint centre method '{method}'; use one of {', '.join(HIP_METHODS)}")
    local = np.array(xyz, dtype=float)
    if side == "left":
        local[2] = -local[2]
    return local, used


def hip_joint_centre(pelvis: Frames, pw_m: float, pd_m: float, side: str, method: str = "harrington",
                     leg_length_m: float | None = None) -> np.ndarray:
    """Hip joint centre in the lab [F, 3] (m) by ``hip_centre_local_mm`` (Harrington 2007 or Bell 1990)."""
    local_mm, _ = hip_centre_local_mm(pw_m * 1000.0, pd_m * 1000.0, side, method,
                                      None if leg_length_m is None else leg_length_m * 1000.0)
    return pelvis.to_lab(local_mm / 1000.0)


def pelvis_frames(lasis: np.ndarray, rasis: np.ndarray, lpsis: np.ndarray, rpsis: np.ndarray) -> Frames:
    mid_asis = 0.5 * (lasis + rasis)
    return frames_from_z_x(mid_asis, rasis - lasis, mid_asis - 0.5 * (lpsis + rpsis))


# --------------------------------------------------------------------------- rigid-fit reconstruction
def rigid_fit(reference: np.ndarray, observed: np.ndarray, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares rotation and translation mapping ``reference`` [k, 3] onto ``observed`` [F, k, 3].

    Soderkvist & Wedin 1993: weighted centroids, cross-covariance H = sum w (p - p_mean)(q - q_mean)^T, SVD
    H = U S V^T, R = V diag(1, 1, det(V U^T)) U^T, t = q_mean - R p_mean; batched over frames. ``weights`` [F, k] is
    1 for observed markers and 0 for missing ones. Frames with fewer than three markers, or markers nearly on a
    line, give NaN.
    """
    w = np.where(finite_points(observed), weights, 0.0)
    q = np.nan_to_num(observed)
    total = w.sum(axis=1)
    safe = np.where(total > 0, total, 1.0)
    p_mean = (w @ reference) / safe[:, None]  # [F, 3]
    q_mean = np.einsum("fk,fkj->fj", w, q) / safe[:, None]
    p_c = reference[None, :, :] - p_mean[:, None, :]
    q_c = q - q_mean[:, None, :]
    h = np.einsum("fk,fki,fkj->fij", w, p_c, q_c)
    u, s, vt = np.linalg.svd(h)
    v = np.swapaxes(vt, 1, 2)
    d = np.sign(np.linalg.det(v @ np.swapaxes(u, 1, 2)))
    d = np.where(d == 0, 1.0, d)
    fix = np.ones((len(d), 3))
    fix[:, 2] = d
    rot = np.einsum("fij,fj,fkj->fik", v, fix, u)
    trans = q_mean - np.einsum("fij,fj->fi", rot, p_mean)
    bad = (total < MIN_RIGID_MARKERS) | (s[:, 1] <= 1e-6 * np.maximum(s[:, 0], 1e-300))
    rot[bad] = np.nan
    trans[bad] = np.nan
    return rot, trans


@dataclass(frozen=True)
class RigidSet:
    """Markers of one segment in the static trial, relative to their centroid (the segment's reference pose)."""

    segment: str  # "pelvis", "left_thigh", "right_shank", ...
    members: tuple[str, ...]  # landmark names, or "<cluster>#<i>" for cluster markers
    reference: np.ndarray  # [k, 3] m, static-trial lab orientation, centroid at 0


@dataclass(frozen=True)
class StaticCalibration:
    """What a static trial tells about an athlete's markers: rigid reference poses per segment and leg length."""

    trial: str
    sets: tuple[RigidSet, ...]
    leg_length_m: float | None  # mean over sides of ASIS -> medial malleolus, for the full Harrington form


def _segment_members(lm: Landmarks) -> dict[str, list[tuple[str, np.ndarray]]]:
    """Every point of each rigid segment available in ``lm`` (landmarks and cluster markers), as [F, 3] arrays."""
    groups: dict[str, list[tuple[str, np.ndarray]]] = {}
    pelvis = [(f"{s}_{site}", lm.points[f"{s}_{site}"]) for s in SIDES for site in ("asis", "psis")
              if f"{s}_{site}" in lm.points]
    groups["pelvis"] = pelvis
    for side in SIDES:
        for segment, sites in SEGMENT_SITES.items():
            members = [(f"{side}_{site}", lm.points[f"{side}_{site}"]) for site in sites
                       if f"{side}_{site}" in lm.points]
            cluster = lm.clusters.get(f"{side}_{segment}_cluster")
            if cluster is not None:
                members += [(f"{side}_{segment}_cluster#{i}", cluster[:, i]) for i in range(cluster.shape[1])]
            groups[f"{side}_{segment}"] = members
    return groups


def calibrate(static_lm: Landmarks) -> StaticCalibration:
    """Reference pose of each segment's markers from a static trial (median over its frames), and leg length.

    Leg length (Harrington et al. 2007) = ASIS to medial malleolus, median over frames, mean of the sides found.
    """
    sets = []
    for segment, members in _segment_members(static_lm).items():
        names, coords = [], []
        for name, xyz in members:
            with np.errstate(all="ignore"):
                med = np.nanmedian(xyz, axis=0) if np.isfinite(xyz).all(axis=1).any() else None
            if med is not None:
                names.append(name)
                coords.append(med)
        if len(names) >= MIN_RIGID_MARKERS:
            ref = np.array(coords)
            sets.append(RigidSet(segment, tuple(names), ref - ref.mean(axis=0)))
    legs = []
    for side in SIDES:
        a, m = static_lm.points.get(f"{side}_asis"), static_lm.points.get(f"{side}_medial_malleolus")
        if a is not None and m is not None:
            d = np.linalg.norm(a - m, axis=1)
            if np.isfinite(d).any():
                legs.append(float(np.nanmedian(d)))
    return StaticCalibration(static_lm.trial, tuple(sets), float(np.mean(legs)) if legs else None)


def reconstruct_missing(lm: Landmarks, cal: StaticCalibration) -> Landmarks:
    """Fill missing landmark frames (or whole landmarks absent from the trial) by a rigid fit of the segment's
    other markers to their static reference pose (Soderkvist & Wedin 1993). Landmarks already present keep their
    measured frames; frames where fewer than three other markers of the segment are seen stay NaN.
    """
    available = _segment_members(lm)
    n_frames = lm.n_frames
    points = dict(lm.points)
    for rset in cal.sets:
        seen = dict(available.get(rset.segment, []))
        landmark_members = [m for m in rset.members if "#" not in m]
        need = [m for m in landmark_members if m not in seen or not np.isfinite(seen[m]).all()]
        if not need:
            continue
        observed = np.full((n_frames, len(rset.members), 3), np.nan)
        for i, m in enumerate(rset.members):
            if m in seen:
                observed[:, i] = seen[m]
        rot, trans = rigid_fit(rset.reference, observed, np.ones(observed.shape[:2]))
        for m in need:
            i = rset.members.index(m)
            estimate = np.einsum("fij,j->fi", rot, rset.reference[i]) + trans
            current = points.get(m, np.full((n_frames, 3), np.nan))
            missing = ~finite_points(current)
            points[m] = np.where(missing[:, None], estimate, current)
    return lm.replace(points=points)


def rebuilt_landmarks(before: Landmarks, after: Landmarks) -> dict[str, float]:
    """Landmark -> percent of frames that ``reconstruct_missing`` filled (seen in ``after``, not in ``before``)."""
    out = {}
    for name, xyz in after.points.items():
        now = finite_points(np.asarray(xyz, float))
        was = finite_points(np.asarray(before.points[name], float)) if name in before.points else np.zeros_like(now)
        filled = now & ~was
        if filled.any():
            out[name] = float(100.0 * filled.mean())
    return out


# --------------------------------------------------------------------------- body
@dataclass(frozen=True)
class BodyDims:
    """Athlete dimensions from one trial (medians over frames), metres."""

    pelvis_width_m: float  # inter-ASIS distance
    pelvis_depth_m: float  # mid-ASIS to mid-PSIS
    leg_length_m: float | None  # ASIS -> medial malleolus (static trial or athletes table), None if unknown
    thigh_length_m: Mapping[str, float]  # hip centre -> knee centre
    shank_length_m: Mapping[str, float]  # knee centre -> ankle centre
    foot_length_m: Mapping[str, float]  # heel -> toe tip


@dataclass(frozen=True)
class Body:
    """Segment frames and joint centres of one trial."""

    rate_hz: float
    pelvis: Frames
    thigh: Mapping[str, Frames]
    shank: Mapping[str, Frames]
    foot: Mapping[str, Frames]
    hip_centre: Mapping[str, np.ndarray]
    knee_centre: Mapping[str, np.ndarray]
    ankle_centre: Mapping[str, np.ndarray]
    heel: Mapping[str, np.ndarray]  # de Leva 1996 foot endpoints: heel -> tip of the longest toe
    toe: Mapping[str, np.ndarray]
    dims: BodyDims
    hip_method: str  # "harrington_full", "harrington_pw" or "bell"
    trial: str = ""

    @property
    def n_frames(self) -> int:
        return int(self.pelvis.origin.shape[0])


def _missing_fraction(xyz: np.ndarray | None) -> float:
    if xyz is None:
        return 1.0
    return float(1.0 - finite_points(xyz).mean()) if len(xyz) else 1.0


def check_landmarks(lm: Landmarks, max_missing_fraction: float = 0.2, calibrated: bool = False) -> None:
    """Raise LandmarkError naming every required landmark missing in more than ``max_missing_fraction`` of frames."""
    problems, segments = [], []
    for side in SIDES:
        for site in REQUIRED_SITES:
            name = f"{side}_{site}"
            frac = _missing_fraction(lm.points.get(name))
            if frac > max_missing_fraction:
                segment = next((seg for seg, sites in SEGMENT_SITES.items() if site in sites), "pelvis")
                if segment not in segments:
                    segments.append(segment)
                if name not in lm.points:
                    what = "is not in this trial"
                else:
                    what = f"is missing in {100 * frac:.0f}% of frames (limit {100 * max_missing_fraction:.0f}%)"
                problems.append(f"landmark {plain_name(name)} {what}")
    if problems:
        if calibrated:
            hint = ("the static trial could not rebuild it: that needs at least three other markers of the "
                    f"{'/'.join(segments)} seen in the same frames (e.g. a cluster in both trials)")
        else:
            hint = ("supply a static trial (with a thigh/shank cluster) so it can be rebuilt from the segment's "
                    "other markers")
        raise LandmarkError("; ".join(problems) + ". Check the labels in markers.toml, fill the gaps in the "
                            "capture software, or " + hint + ".", trial=lm.trial)


def _median_norm(v: np.ndarray) -> float:
    with np.errstate(all="ignore"):
        return float(np.nanmedian(norm_rows(v)))


def _check_orientation(lm: Landmarks, pelvis: Frames, thigh: dict, shank: dict) -> None:
    """Catch swapped labels: pelvis Y must point up, and thigh / shank Z (toward the right) must agree with the
    pelvis / thigh Z (flexion is about Z, so it does not change them)."""
    with np.errstate(all="ignore"):
        if np.nanmedian(pelvis.y[:, 2]) < 0:
            raise PlausibilityError("the left and right ASIS (or PSIS) look swapped: the pelvis points down; "
                                    "check the side of those labels in markers.toml", trial=lm.trial)
        for side in SIDES:
            for name, seg, ref, pair in (("thigh", thigh[side], pelvis, "epicondyle"),
                                         ("shank", shank[side], thigh[side], "malleolus")):
                if np.nanmedian(dot_rows(seg.z, ref.z)) < 0:
                    raise PlausibilityError(
                        f"{side} lateral and medial {pair} look swapped (or on the wrong side): the {side} {name} "
                        "points backwards; check those labels in markers.toml", trial=lm.trial)


def build_body(lm: Landmarks, *, hip_method: str = "harrington", leg_length_m: float | None = None,
               calibration: StaticCalibration | None = None, max_missing_fraction: float = 0.2) -> Body:
    """Pelvis, thigh, shank and foot frames and joint centres for both sides, vectorised over frames.

    With a static ``calibration``, missing landmarks are first rebuilt by rigid fit and its leg length is used
    unless ``leg_length_m`` is given. Raises LandmarkError naming each required landmark missing in more than
    ``max_missing_fraction`` of frames; frames with a missing landmark give NaN in what depends on it.
    """
    if hip_method not in HIP_METHODS:
        raise ConfigError(f"unknown hip joint centre method '{hip_method}'; use one of {', '.join(HIP_METHODS)}")
    if calibration is not None:
        lm = reconstruct_missing(lm, calibration)
        if leg_length_m is None:
            leg_length_m = calibration.leg_length_m
    check_landmarks(lm, max_missing_fraction, calibrated=calibration is not None)
    p = lm.points
    pelvis = pelvis_frames(p["left_asis"], p["right_asis"], p["left_psis"], p["right_psis"])
    pw = _median_norm(p["right_asis"] - p["left_asis"])
    pd = _median_norm(pelvis.origin - 0.5 * (p["left_psis"] + p["right_psis"]))
    thigh, shank, foot, hip, knee, ankle, heel, toe = {}, {}, {}, {}, {}, {}, {}, {}
    used = hip_method
    for side in SIDES:
        sign = 1.0 if side == "right" else -1.0  # medial -> lateral points right on the right side, left on the left
        lat_epi, med_epi = p[f"{side}_lateral_epicondyle"], p[f"{side}_medial_epicondyle"]
        lat_mal, med_mal = p[f"{side}_lateral_malleolus"], p[f"{side}_medial_malleolus"]
        hip[side] = hip_joint_centre(pelvis, pw, pd, side, hip_method, leg_length_m)
        _, used = hip_centre_local_mm(pw * 1e3, pd * 1e3, side, hip_method,
                                      None if leg_length_m is None else leg_length_m * 1e3)
        knee[side] = 0.5 * (lat_epi + med_epi)
        ankle[side] = 0.5 * (lat_mal + med_mal)
        thigh[side] = frames_from_y_z(hip[side], hip[side] - knee[side], sign * (lat_epi - med_epi))
        shank[side] = frames_from_y_z(knee[side], knee[side] - ankle[side], sign * (lat_mal - med_mal))
        heel[side] = p[f"{side}_heel"]
        mid_met = 0.5 * (p[f"{side}_first_metatarsal"] + p[f"{side}_fifth_metatarsal"])
        foot[side] = frames_from_x_y(ankle[side], mid_met - heel[side], shank[side].y)
        toe_tip = p.get(f"{side}_toe_tip")
        if toe_tip is not None and _missing_fraction(toe_tip) <= max_missing_fraction:
            toe[side] = toe_tip
        else:
            toe[side] = heel[side] + (mid_met - heel[side]) / METATARSAL_HEAD_FRACTION
    _check_orientation(lm, pelvis, thigh, shank)
    dims = BodyDims(
        pelvis_width_m=pw,
        pelvis_depth_m=pd,
        leg_length_m=leg_length_m,
        thigh_length_m={s: _median_norm(hip[s] - knee[s]) for s in SIDES},
        shank_length_m={s: _median_norm(knee[s] - ankle[s]) for s in SIDES},
        foot_length_m={s: _median_norm(toe[s] - heel[s]) for s in SIDES},
    )
    return Body(rate_hz=lm.rate_hz, pelvis=pelvis, thigh=thigh, shank=shank, foot=foot, hip_centre=hip,
                knee_centre=knee, ankle_centre=ankle, heel=heel, toe=toe, dims=dims, hip_method=used,
                trial=lm.trial)
