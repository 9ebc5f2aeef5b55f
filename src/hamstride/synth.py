"""Synthetic sprint trials with known truth, and the invented demo squad.

Truth is defined by construction in the conventions of DEVELOPERS.md: ISB segment frames (Wu et al. 2002) are
built first, landmarks are then placed in those frames, and the truth joint angles are the Grood & Suntay JCS
decomposition (intrinsic Z-X-Y Cardan of ``R_prox^T R_dist``) of the truth frames. Landmarks sit where the
pipeline's marker-based frames reproduce the truth frames, except at the hip: the true hip centre lies a person's
offset (``AthleteBody.hip_centre_offset_m``, 7 mm for bodies from ``from_height``) away from the Harrington et al. 2007
pelvis-width regression (J Biomech 40:595) the pipeline uses; knee/ankle centres are midway between
epicondyles/malleoli, heel and metatarsal heads at one height in the foot frame. Optional real-capture shapes:
jogging (2.5-6 m/s), thigh/shank skin markers sliding on the bone (``soft_tissue_mm``), an overground capture volume
(``capture_volume_m``), cluster-only runs without knee/ankle markers (``include_knee_ankle``), and walking
(``simulate_walk``).

Model: each leg is a planar hip-knee-ankle chain (thigh, shank, foot share the lab's medio-lateral Z axis) in the
vertical plane through its hip centre; the pelvis translates, tilts, rolls and yaws (so hip adduction and rotation,
a few degrees, come from pelvic obliquity and rotation; knee and ankle are hinges) and shifts sideways so that the
stance hip stays over the planted foot. The hips fly ballistically between contacts (vertical acceleration -g).
Stance (about 22 % of the stride, Mann & Hagy 1980): the toe tip is pinned to the ground (treadmill: moves backward
at belt speed) while the foot pitch follows a roll-over (the heel drops at strike); thigh and shank come from
planar two-link inverse kinematics. Swing is built so that the net joint moments it asks for (swing inverse
dynamics) stay of published sprint size: hip and knee angles follow least-effort curves (C2 quintics with the least
integral of the squared angular acceleration, no steps of acceleration) - hip flexion rises to its peak (s_hip_peak
of the swing), then extends into the strike under the least constant acceleration that joins the peak to the strike
state; knee flexion rises to its early-swing peak, then extends and flexes again into the strike, arriving with the
acceleration of a plan of two constant accelerations switching at the hip's peak. The hips' height in stance:
whichever of two C2 designs (a mid-stance knot, or one quintic strike to toe-off) falls less below -g. The swing
ends in the stance's first state (angles and rates; the heel-drop rate at strike is set per step so the thigh
arrives at the rate the hip peak timing asks for, and the foot's acceleration so the thigh's angular acceleration
carries on into stance), so there is no impact in thigh and shank; in the last
6 ms the light foot turns toe-up and stops the toe's descent (a sharp upward-acceleration peak at touchdown, as at
a real one). Swing joins stance at toe-off with matched rates (the toe lifts with an acceleration step, a jerk
peak). Key values: references.md "Typical sprint kinematics" [M]. Foot strike / toe-off truth = the instants the
toe tip reaches / leaves the ground. Strides vary slightly (seeded jitter of timing and key angles). An asymmetric
leg has less hip flexion from its peak through late swing (released over the last 60 ms before strike) and less
knee extension from its knee peak on (it lands with the knee flexed by that deficit). Only the knee deficit keeps the
terminal-swing moments of published size (the hip deficit's release asks for 8-15 N m/kg of hip extension), so the
demo squad's guarding leg uses the knee deficit alone.

Internal lab frame: x forward (travel), y to the athlete's left, z up, metres. Files may be Y-up, travel along -x,
and in mm, cm or m.
"""
from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Mapping

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.optimize import brentq

from .errors import ConfigError, HamstrideError
from .numerics import SIDES

GRAVITY = 9.81  # m/s^2
_RIGHT_SIGN = {"right": 1.0, "left": -1.0}
# A person's true hip centre is not where the Harrington et al. 2007 regression puts it: its leave-one-out error is
# about 5/4/3 mm (x/y/z) [V, references.md]. Bodies from ``AthleteBody.from_height`` carry an offset of that size
# (7 mm: further back, lower and more lateral), so the pipeline's hip-centre estimate is not the truth by construction.
TYPICAL_HIP_OFFSET_M = (-0.005, -0.004, 0.003)  # lateral direction along the segment +Z (which points right)
_DEG = np.pi / 180.0
ANGLE_NAMES = ("hip_flexion", "hip_adduction", "hip_rotation", "knee_flexion", "ankle_dorsiflexion")

# Landmark name (DEVELOPERS.md) -> default C3D label suffix (owned by landmarks.py; a test checks they agree).
LANDMARK_LABELS = {
    "asis": "asis", "psis": "psis", "lateral_epicondyle": "knee.lat", "medial_epicondyle": "knee.med",
    "lateral_malleolus": "ankle.lat", "medial_malleolus": "ankle.med", "heel": "heel",
    "first_metatarsal": "met1", "fifth_metatarsal": "met5", "toe_tip": "toe",
}
MEDIAL_SITES = ("medial_epicondyle", "medial_malleolus")
CLUSTER_SEGMENTS = ("thigh", "shank")


# ------------------------------------------------------------------------------------------------ body and spec
@dataclass(frozen=True)
class AthleteBody:
    """Segment dimensions of one (invented) athlete, m and kg."""

    height_m: float
    mass_kg: float
    sex: str  # 'male' / 'female'
    pelvis_width_m: float  # inter-ASIS distance (PW)
    pelvis_depth_m: float  # mid-ASIS to mid-PSIS (PD)
    thigh_length_m: float  # hip centre -> knee centre
    shank_length_m: float  # knee centre -> ankle centre
    foot_length_m: float  # heel -> toe tip
    knee_width_m: float  # epicondyle to epicondyle
    ankle_width_m: float  # malleolus to malleolus
    # True hip centre minus the Harrington et al. 2007 pelvis-width estimate, in the pelvis frame (x anterior, y up,
    # z lateral: mirrored on the left), m. Real hip centres deviate from the regression: its leave-one-out error is
    # about 5/4/3 mm (x/y/z) and 12.3 +/- 5.9 mm in a CT study (Mantovani et al. 2016) [V, references.md].
    hip_centre_offset_m: tuple[float, float, float] = (0.0, 0.0, 0.0)

    @classmethod
    def from_height(cls, height_m: float, mass_kg: float = 75.0, sex: str = "male") -> "AthleteBody":
        """Proportional body from stature.

        Segment lengths / stature from de Leva 1996 (J Biomech 29:1223, Table 1 mean lengths and statures; from
        memory): male thigh 422.2/1741, shank 434.0/1741, foot 258.1/1741; female 368.5/1735, 432.3/1735,
        228.3/1735. Pelvis width and joint widths: invented, common-practice magnitudes (PW 0.23-0.28 m). Pelvis
        depth is set so that the full and the pelvis-width-only Harrington et al. 2007 forms give the same hip
        centre z (0.28 PD + 0.16 PW + 7.9 = 0.33 PW + 7.3 mm); with these proportions their y agree within ~2 mm,
        so a hip centre estimated with or without leg length matches the truth.
        """
        if sex not in ("male", "female"):
            raise ConfigError(f"sex must be 'male' or 'female', not {sex!r}")
        h = float(height_m)
        if sex == "male":
            thigh, shank, foot, pw = 422.2 / 1741, 434.0 / 1741, 258.1 / 1741, 0.142 * h
        else:
            thigh, shank, foot, pw = 368.5 / 1735, 432.3 / 1735, 228.3 / 1735, 0.135 * h
        pd = (0.17 * pw * 1000.0 - 0.6) / 0.28 / 1000.0
        return cls(height_m=h, mass_kg=float(mass_kg), sex=sex, pelvis_width_m=pw, pelvis_depth_m=pd,
                   thigh_length_m=thigh * h, shank_length_m=shank * h, foot_length_m=foot * h,
                   knee_width_m=0.056 * h, ankle_width_m=0.040 * h, hip_centre_offset_m=TYPICAL_HIP_OFFSET_M)


_DEFAULT_BODY = AthleteBody.from_height(1.80, 75.0, "male")


@dataclass(frozen=True)
class SprintSpec:
    """What to simulate and how the file should look."""

    speed_m_s: float = 8.5
    rate_hz: float = 250.0
    duration_s: float = 2.0
    treadmill: bool = False
    vertical_axis: str = "z"  # the FILE's vertical axis: 'z' or 'y'
    travel_sign: int = 1  # direction of travel along the FILE's forward axis (+1 / -1)
    units: str = "mm"  # 'mm', 'cm' or 'm' in the FILE
    noise_mm: float = 0.5
    n_gaps: int = 3  # short gaps (2-8 frames) in random markers
    asymmetry_side: str | None = None
    hip_flexion_deficit_deg: float = 0.0  # less late-swing hip flexion on asymmetry_side
    knee_extension_deficit_deg: float = 0.0  # less late-swing knee extension on asymmetry_side
    stride_jitter: float = 1.0  # scale of the natural stride-to-stride variation (0 = identical strides)
    include_medial: bool = True
    include_clusters: bool = True
    include_events: bool = False  # write foot strikes / toe-offs into the C3D EVENT group
    full_body: bool = False  # add trunk, head and arm markers (UPPER_BODY_LABELS) above the pelvis
    label_prefix: str = ""  # write labels as 'PREFIX:label', as capture software does for a named subject
    nul_padding: int = 0  # pad the labels and the unit with this many NUL bytes (C strings; ezc3d writes them)
    # Cluster-only dynamic trial: False leaves out every knee and ankle marker (lateral and medial), as protocols do
    # that track thigh and shank by clusters and place those markers only in the static trial.
    include_knee_ankle: bool = True
    # Overground capture volume: (start, end) in m along the travel from where the pelvis is at t = 0; a marker is
    # seen only while it is inside (each marker's edges shifted by up to +/-0.15 m: cameras see markers enter at
    # slightly different places). None: seen everywhere. Ignored on a treadmill.
    capture_volume_m: tuple[float, float] | None = None
    # Soft-tissue movement of the thigh and shank skin markers (clusters, epicondyles, malleoli) relative to the
    # bone, in mm: a displacement that grows with knee flexion and a decaying wobble after each foot strike. A few
    # mm by default, so the pipeline never sees markers rigidly fixed to the bone (0 = rigid).
    soft_tissue_mm: float = 2.0
    seed: int = 0
    body: AthleteBody = _DEFAULT_BODY
    athlete: str = "SYN01"


@dataclass(frozen=True)
class SprintTruth:
    """Noise-free truth of a synthetic trial (internal lab frame, SI units)."""

    time_s: np.ndarray  # [F]
    rate_hz: float
    angles: Mapping[str, Mapping[str, np.ndarray]]  # side -> name -> [F] rad
    foot_strikes_s: Mapping[str, np.ndarray]
    toe_offs_s: Mapping[str, np.ndarray]
    speed_m_s: float
    treadmill: bool
    body: AthleteBody
    landmarks_lab: Mapping[str, np.ndarray]  # landmark name (right_asis ...) -> [F, 3]
    markers_lab: Mapping[str, np.ndarray]  # C3D label -> [F, 3], noise-free
    origins: Mapping[str, np.ndarray]  # 'pelvis', 'right_thigh', ... -> [F, 3]
    axes: Mapping[str, np.ndarray]  # same keys -> [F, 3, 3], columns = segment X, Y, Z in the lab
    joint_centres: Mapping[str, np.ndarray]  # 'right_hip', 'right_knee', 'right_ankle', ... -> [F, 3]
    contact_landmark: str = "toe_tip"  # the landmark pinned to the ground in stance
    belt_speed_m_s: float = 0.0


# ------------------------------------------------------------------------------------------------ geometry helpers
def jcs_zxy(prox_axes: np.ndarray, dist_axes: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Intrinsic Z-X-Y Cardan angles of ``R_prox^T R_dist`` (Grood & Suntay 1983 JCS), closed form.

    With R = Rz(a) Rx(b) Ry(c): R[2,1] = sin b, R[0,1] = -sin a cos b, R[1,1] = cos a cos b,
    R[2,0] = -cos b sin c, R[2,2] = cos b cos c.
    """
    rel = np.einsum("...ji,...jk->...ik", prox_axes, dist_axes)
    b = np.arcsin(np.clip(rel[..., 2, 1], -1.0, 1.0))
    a = np.arctan2(-rel[..., 0, 1], rel[..., 1, 1])
    c = np.arctan2(-rel[..., 2, 0], rel[..., 2, 2])
    return a, b, c


def _sagittal_axes(pitch: np.ndarray) -> np.ndarray:
    """Leg-segment axes [n, 3, 3] for a rotation ``pitch`` about the segment Z (= lab -y) from the upright pose."""
    c, s = np.cos(pitch), np.sin(pitch)
    z = np.zeros_like(pitch)
    x_axis = np.stack([c, z, s], axis=-1)
    y_axis = np.stack([-s, z, c], axis=-1)
    z_axis = np.stack([z, z - 1.0, z], axis=-1)
    return np.stack([x_axis, y_axis, z_axis], axis=-1)


def _pelvis_axes(pitch: np.ndarray, roll: np.ndarray, yaw: np.ndarray) -> np.ndarray:
    """Pelvis axes = Rz_lab(yaw) Rx_lab(roll) R_sagittal(pitch)."""
    base = _sagittal_axes(pitch)
    cr, sr = np.cos(roll), np.sin(roll)
    cy, sy = np.cos(yaw), np.sin(yaw)
    one, zero = np.ones_like(roll), np.zeros_like(roll)
    rx = np.stack([np.stack([one, zero, zero], -1), np.stack([zero, cr, -sr], -1), np.stack([zero, sr, cr], -1)], -2)
    rz = np.stack([np.stack([cy, -sy, zero], -1), np.stack([sy, cy, zero], -1), np.stack([zero, zero, one], -1)], -2)
    return rz @ rx @ base


def _rot2(pitch: np.ndarray, local: np.ndarray) -> np.ndarray:
    """Sagittal (x, z) lab offset of a foot-frame point (X, Y) for foot pitch ``pitch``: [n, 2]."""
    c, s = np.cos(pitch), np.sin(pitch)
    return np.stack([local[0] * c - local[1] * s, local[0] * s + local[1] * c], axis=-1)


def _smoothstep5(u: np.ndarray) -> np.ndarray:
    u = np.clip(u, 0.0, 1.0)
    return u ** 3 * (10 - 15 * u + 6 * u * u)


class _QuinticKeys:
    """C2 curve through key points with given value, slope and curvature: one quintic Hermite per interval."""

    def __init__(self, s, value, slope, curvature):
        self.s = np.asarray(s, dtype=float)
        self.keys = np.array([value, slope, curvature], dtype=float)  # [3, n]

    def __call__(self, s: np.ndarray) -> np.ndarray:
        s = np.asarray(s, dtype=float)
        i = np.clip(np.searchsorted(self.s, s, side="right") - 1, 0, self.s.size - 2)
        h = self.s[i + 1] - self.s[i]
        p0, v0, a0 = self.keys[:, i]
        p1, v1, a1 = self.keys[:, i + 1]
        u = (s - self.s[i]) / h
        u2, u3, u4, u5 = u * u, u ** 3, u ** 4, u ** 5
        return (p0 * (1 - 10 * u3 + 15 * u4 - 6 * u5) + v0 * h * (u - 6 * u3 + 8 * u4 - 3 * u5)
                + a0 * h * h * (0.5 * u2 - 1.5 * u3 + 1.5 * u4 - 0.5 * u5) + a1 * h * h * (0.5 * u3 - u4 + 0.5 * u5)
                + v1 * h * (-4 * u3 + 7 * u4 - 3 * u5) + p1 * (10 * u3 - 15 * u4 + 6 * u5))


def _least_effort(s, value, slope, curvature) -> _QuinticKeys:
    """C2 quintic-Hermite curve through knots of given value and slope whose free curvatures (``None`` in
    ``curvature``) make the integral of the squared second derivative least (it is linear in them: least squares).

    Smooth joint motions are closer to least squared acceleration (or jerk) than to piecewise constant accelerations
    (Flash & Hogan 1985, J Neurosci 5:1688 [M]); for the same move in the same time the peak rate, and so the kinetic
    energy put in and taken out, is lower, and the acceleration has no steps. Between two knots with free
    curvatures the result is the cubic through them (a linearly changing acceleration)."""
    s = np.asarray(s, dtype=float)
    free = [i for i, c in enumerate(curvature) if c is None]
    fixed = np.array([0.0 if c is None else float(c) for c in curvature])
    grid = np.concatenate([np.linspace(a, b, 101)[:-1] for a, b in zip(s[:-1], s[1:])] + [s[-1:]])
    weight = np.gradient(grid)

    def acc(curv):
        out = _QuinticKeys(s, value, slope, curv)(grid)
        return np.gradient(np.gradient(out, grid), grid)

    base = acc(fixed)
    if free:
        cols = []
        for i in free:
            unit = fixed.copy()
            unit[i] += 1.0
            cols.append(acc(unit) - base)
        g = np.sqrt(weight)[:, None] * np.stack(cols, axis=1)
        sol = np.linalg.lstsq(g, -np.sqrt(weight) * base, rcond=None)[0]
        fixed[free] += sol
    return _QuinticKeys(s, value, slope, fixed)


class _Spliced:
    """Curve of consecutive pieces: ``pieces[k]`` holds from ``starts[k]`` to the next start."""

    def __init__(self, starts, pieces):
        self.starts, self.pieces = np.asarray(starts, dtype=float), list(pieces)

    def __call__(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        flat = np.atleast_1d(x).ravel()
        i = np.clip(np.searchsorted(self.starts, flat, side="right") - 1, 0, len(self.pieces) - 1)
        out = np.empty_like(flat)
        for k, piece in enumerate(self.pieces):
            m = i == k
            if m.any():
                out[m] = piece(flat[m])
        return out.reshape(x.shape)


def _derivatives(fun: Callable[[np.ndarray], np.ndarray], t0: float, eps: float = 2e-5):
    """Value, first and second time derivative of a vectorised function at t0 (central differences)."""
    v = fun(np.array([t0 - eps, t0, t0 + eps]))
    return v[1], (v[2] - v[0]) / (2 * eps), (v[2] - 2 * v[1] + v[0]) / (eps * eps)


# ------------------------------------------------------------------------------------------------ local geometry
def hip_centre_local(body: AthleteBody, side: str) -> np.ndarray:
    """Hip joint centre in the pelvis frame (m): Harrington et al. 2007 pelvis-width-only regression, plus the
    body's ``hip_centre_offset_m`` (a real person's deviation from the regression).

    x = -0.24 PD - 9.9, y = -0.30 PW - 10.9, z = +/-(0.33 PW + 7.3) mm (+ right); references.md table [V].
    """
    pw, pd = body.pelvis_width_m * 1000.0, body.pelvis_depth_m * 1000.0
    dx, dy, dz = body.hip_centre_offset_m
    return (np.array([-0.24 * pd - 9.9, -0.30 * pw - 10.9, _RIGHT_SIGN[side] * (0.33 * pw + 7.3)]) / 1000.0
            + np.array([dx, dy, _RIGHT_SIGN[side] * dz]))


def _foot_local(body: AthleteBody, side: str) -> dict[str, np.ndarray]:
    """Foot landmarks in the foot frame (origin ankle centre). Heel and metatarsal heads at one plantar height."""
    lf = body.foot_length_m
    plantar = -0.25 * lf  # ankle centre about a quarter foot length above the sole markers (invented)
    lat = _RIGHT_SIGN[side]
    return {
        "heel": np.array([-0.22 * lf, plantar, 0.0]),
        "first_metatarsal": np.array([0.52 * lf, plantar, -lat * 0.13 * lf]),
        "fifth_metatarsal": np.array([0.44 * lf, plantar, lat * 0.13 * lf]),
        "toe_tip": np.array([0.78 * lf, plantar, -lat * 0.03 * lf]),
    }


def _segment_local(body: AthleteBody, side: str) -> dict[str, dict[str, np.ndarray]]:
    """Landmarks and cluster markers in their segment frames."""
    lat = _RIGHT_SIGN[side]
    lt, ls = body.thigh_length_m, body.shank_length_m
    kw, aw = body.knee_width_m, body.ankle_width_m
    thigh = {
        "lateral_epicondyle": np.array([0.0, -lt, lat * kw / 2]),
        "medial_epicondyle": np.array([0.0, -lt, -lat * kw / 2]),
        "thigh.a": np.array([0.035, -0.40 * lt, lat * 0.085]),
        "thigh.b": np.array([-0.030, -0.52 * lt, lat * 0.080]),
        "thigh.c": np.array([0.030, -0.66 * lt, lat * 0.075]),
    }
    shank = {
        "lateral_malleolus": np.array([0.0, -ls, lat * aw / 2]),
        "medial_malleolus": np.array([0.0, -ls, -lat * aw / 2]),
        "shank.a": np.array([0.030, -0.30 * ls, lat * 0.060]),
        "shank.b": np.array([-0.025, -0.45 * ls, lat * 0.058]),
        "shank.c": np.array([0.030, -0.60 * ls, lat * 0.052]),
    }
    pelvis = {
        "asis": np.array([0.0, 0.0, lat * body.pelvis_width_m / 2]),
        "psis": np.array([-body.pelvis_depth_m, 0.0, lat * 0.045 * body.height_m / 1.80]),
    }
    return {"pelvis": pelvis, "thigh": thigh, "shank": shank, "foot": _foot_local(body, side)}


def marker_labels(include_medial: bool = True, include_clusters: bool = True) -> tuple[str, ...]:
    """Default C3D labels in file order (pelvis, right leg, left leg, clusters)."""
    labels = []
    for side in ("right", "left"):
        for site, label in LANDMARK_LABELS.items():
            if site in MEDIAL_SITES and not include_medial:
                continue
            labels.append(f"{side[0]}.{label}")
    if include_clusters:
        for side in ("right", "left"):
            for seg in CLUSTER_SEGMENTS:
                labels.extend(f"{side[0]}.{seg}.{k}" for k in "abc")
    return tuple(labels)


# ------------------------------------------------------------------------------------------------ sprint design
@dataclass(frozen=True)
class _Design:
    """Key values of one sprint (radians, seconds, metres)."""

    stride_time: float
    pelvis_tilt: float
    hip_td: float
    knee_td: float
    pitch_td: float
    knee_to: float
    pitch_to: float
    hip_peak: float
    knee_peak: float
    s_hip_peak: float = 0.57  # swing phase (0 = toe-off, 1 = foot strike) of the hip-flexion peak
    s_knee_peak: float = 0.35  # ... and of the knee-flexion peak
    ankle_acc_td: float = 800.0  # rad/s^2: at least this ankle dorsiflexion acceleration before strike
    ankle_floor: float = -35.0 * _DEG  # late-swing plantar flexion stays above this
    heel_drop_rate: float = 12.0  # rad/s foot pitch rate (heel dropping) at strike, first guess (solved per step)
    landing_window: float = 0.006  # the toe's descent stops over the last 6 ms (the foot turns toe-up onto it)
    touchdown_foot_rate: float = 8.0  # rad/s the foot turns faster (toe up) in stance than at the end of swing
    deficit_release_s: float = 0.06  # an asymmetric leg's hip-flexion deficit is released over the last 60 ms


def _design(speed: float, leg_length_m: float = 0.886) -> _Design:
    """Running key values as a function of speed: sprints 6-10.5 m/s, jogging 2.5-6 m/s.

    Sprints (from 6 m/s): stride 0.40-0.46 s, contact 0.09-0.12 s [M, references.md]; peak hip flexion 65-80 deg,
    knee 15-30 deg at foot strike, peak knee flexion 120-135 deg, late-swing knee extension to 10-30 deg (here the
    late-swing minimum follows from the knee's constant-acceleration design, about 5-8 deg below the strike value)
    [M, references.md]. Faster running: shorter stride time, more hip flexion, more late-swing knee extension
    (common practice). Stride time scales with the square root of leg length (dynamic similarity; 0.886 m =
    hip-to-ankle of a 1.80 m man). Strike: knee 27 deg and the hip a little further back at toe-off (pitch -53 deg,
    hip 25 mm below its strike height) so that a less straight landing leg keeps the contact time (invented, within
    the ranges above).

    Jogging (below 6 m/s, blending linearly to the values at 3 m/s): stride time 0.72 s at 3 m/s (Lieberman et al.
    2015, J Exp Biol 218:3406: metabolically optimal 84.8 strides/min at 3.0 m/s [V, abstract]); the same strike and
    toe-off geometry as a sprint, so the contact, covering the same ground at a lower speed, lasts about 0.26 s at
    3 m/s (0.25-0.30 s [M]); peak hip flexion 50 deg and peak swing knee flexion 100 deg at 3 m/s (smaller than a
    sprint's; from memory, common magnitudes of jogging kinematics).
    """
    k = float(np.clip((speed - 7.0) / 2.5, -0.4, 1.4))
    jog = float(np.clip((6.0 - speed) / 3.0, 0.0, 1.0))  # 0 from 6 m/s up, 1 at 3 m/s and below

    def blend(sprint: float, at_3_m_s: float) -> float:
        return sprint + (at_3_m_s - sprint) * jog

    return _Design(
        stride_time=blend(0.470 - 0.036 * k, 0.72) * np.sqrt(leg_length_m / 0.886),
        pelvis_tilt=-12.0 * _DEG,
        hip_td=(37.0 + 2.0 * k) * _DEG,
        knee_td=27.0 * _DEG,
        pitch_td=-14.0 * _DEG,
        knee_to=(20.0 - 4.0 * k) * _DEG,
        pitch_to=-53.0 * _DEG,
        hip_peak=blend(70.0 + 6.0 * k, 50.0) * _DEG,
        knee_peak=blend(124.0 + 6.0 * k, 100.0) * _DEG,
    )


def _planar_leg(phi_t, phi_s, phi_f, body: AthleteBody, toe_local: np.ndarray):
    """Knee, ankle and toe (x, z) relative to the hip for absolute thigh/shank/foot pitches."""
    lt, ls = body.thigh_length_m, body.shank_length_m
    knee = np.stack([lt * np.sin(phi_t), -lt * np.cos(phi_t)], axis=-1)
    ankle = knee + np.stack([ls * np.sin(phi_s), -ls * np.cos(phi_s)], axis=-1)
    toe = ankle + _rot2(phi_f, toe_local)
    return knee, ankle, toe


def _two_link_ik(rel_ankle: np.ndarray, body: AthleteBody) -> tuple[np.ndarray, np.ndarray]:
    """Thigh and shank pitch placing the ankle at ``rel_ankle`` (x, z from the hip), knee flexed forward."""
    lt, ls = body.thigh_length_m, body.shank_length_m
    d = np.linalg.norm(rel_ankle, axis=-1)
    if np.any(d > lt + ls) or np.any(d < abs(lt - ls)):
        raise HamstrideError("the simulated stance leg cannot reach the ground contact; choose a speed of "
                             "7-9.5 m/s and a body from AthleteBody.from_height", code="synth")
    knee = np.pi - np.arccos(np.clip((lt * lt + ls * ls - d * d) / (2 * lt * ls), -1.0, 1.0))
    beta = np.arctan2(rel_ankle[..., 0], -rel_ankle[..., 1])
    gamma = np.arccos(np.clip((lt * lt + d * d - ls * ls) / (2 * lt * d), -1.0, 1.0))
    phi_t = beta + gamma
    return phi_t, phi_t - knee


@dataclass
class _Step:
    side: str
    strike: float
    toe_off: float
    contact_x: float = np.nan  # where the toe tip is pinned (ground frame)
    stance_pitch: Callable[[np.ndarray], np.ndarray] | None = None  # foot pitch over stance fraction 0..1
    hip_peak: float = np.nan  # swing targets of the swing that follows this stance (rad)
    hip_deficit: float = 0.0  # asymmetry: less hip flexion / knee extension in late swing (rad)
    knee_deficit: float = 0.0
    knee_peak: float = np.nan
    ankle_peak: float = np.nan


class _Gait:
    """Continuous-time model of one sprint (ground frame); every method takes an array of times."""

    def __init__(self, spec: SprintSpec, rng: np.random.Generator):
        self.spec, self.body = spec, spec.body
        self.design = d = _design(spec.speed_m_s, spec.body.thigh_length_m + spec.body.shank_length_m)
        self.v = float(spec.speed_m_s)
        self.toe_local = {s: _foot_local(self.body, s)["toe_tip"][:2] for s in SIDES}
        self.hip_local = {s: hip_centre_local(self.body, s) for s in SIDES}
        jitter = float(spec.stride_jitter)

        # Foot-strike configuration per side: the toe offset from the hip fixes the hip height at strike. A leg
        # with a knee-extension deficit also lands with a more flexed knee.
        pitch_at_strike = d.pelvis_tilt + 1.5 * _DEG  # pelvis pitch is phase-locked: same at every strike
        lt, ls = self.body.thigh_length_m, self.body.shank_length_m
        self.hip_td, self.knee_td, self.td_reach, self.h_td, self.h_to, self.contact_time = {}, {}, {}, {}, {}, {}
        for side in SIDES:
            asym = spec.asymmetry_side == side
            self.hip_td[side] = d.hip_td
            self.knee_td[side] = d.knee_td + (spec.knee_extension_deficit_deg * _DEG if asym else 0.0)
            phi_t = pitch_at_strike + self.hip_td[side]
            _, _, toe = _planar_leg(phi_t, phi_t - self.knee_td[side], d.pitch_td, self.body, self.toe_local[side])
            self.td_reach[side] = toe  # (x ahead of, z below) the hip at foot strike
            self.h_td[side] = -toe[1]
            self.h_to[side] = self.h_td[side] - 0.025
            # Contact time from the toe-off geometry: knee at knee_to with the foot pitched to pitch_to.
            reach = np.sqrt(lt * lt + ls * ls + 2 * lt * ls * np.cos(d.knee_to))
            toe_from_ankle = _rot2(np.array(d.pitch_to), self.toe_local[side])
            ankle_height = -toe_from_ankle[1]
            behind = np.sqrt(reach ** 2 - (self.h_to[side] - ankle_height) ** 2) - toe_from_ankle[0]
            self.contact_time[side] = (toe[0] + behind) / self.v

        # Step timeline: alternate right/left, starting before t = 0, with small stride-to-stride timing jitter.
        t = -d.stride_time * (1.0 + rng.uniform(0.0, 1.0))
        steps: list[_Step] = []
        side = "right"
        while t < spec.duration_s + 1.5 * d.stride_time:
            steps.append(_Step(side, t, t + self.contact_time[side]))
            t += 0.5 * d.stride_time * (1.0 + 0.012 * jitter * rng.standard_normal())
            side = "left" if side == "right" else "right"
        self.steps = steps
        strikes = np.array([s.strike for s in steps])
        self.phase = CubicSpline(strikes, 0.5 * np.arange(len(steps)))  # right strides; right strike = integer

        # Pelvis vertical: the stance side's hip height at strike, mid-stance and toe-off; ballistic flight in
        # between (vertical acceleration -g, so the hip falls into each strike as a body in flight does).
        knots_t, knots_z, knots_v, knots_a = [], [], [], []
        off = lambda tk, sd: self._hip_offset(np.array([tk]), sd)[0, 2]
        v_td = None
        for st, nxt in zip(steps[:-1], steps[1:]):
            z_td = self.h_td[st.side] - off(st.strike, st.side)
            z_to = self.h_to[st.side] - off(st.toe_off, st.side)
            z_next = self.h_td[nxt.side] - off(nxt.strike, nxt.side)
            flight = nxt.strike - st.toe_off
            v_to = (z_next - z_to) / flight + 0.5 * GRAVITY * flight
            if v_td is None:
                v_td = v_to - GRAVITY * flight
            # stance: either the upward acceleration grows linearly from -g and stops the fall at mid-stance, then
            # a second quintic to toe-off, or one quintic from strike to toe-off (a single hump); whichever falls
            # less below -g (the ground can only push): at sprint speeds the end states ask for a late push, which
            # the mid-stance knot turned into a swing of about -54 / +87 m/s^2 just before toe-off
            half = 0.5 * (st.toe_off - st.strike)
            a_mid = -2.0 * v_td / half + GRAVITY
            dip = -(v_td * half + (a_mid - 2.0 * GRAVITY) / 6.0 * half * half)
            candidates = ([[st.strike, st.strike + half, st.toe_off], [z_td, z_td - dip, z_to], [v_td, 0.0, v_to],
                           [-GRAVITY, a_mid, -GRAVITY]],
                          [[st.strike, st.toe_off], [z_td, z_to], [v_td, v_to], [-GRAVITY, -GRAVITY]])
            grid = np.linspace(st.strike, st.toe_off, 201)
            lowest = [np.gradient(np.gradient(_QuinticKeys(*c)(grid), grid), grid)[2:-2].min() for c in candidates]
            for keys, new in zip((knots_t, knots_z, knots_v, knots_a), candidates[int(np.argmax(lowest))]):
                keys += new
            v_td = v_to - GRAVITY * flight  # arriving at the next strike
        last = steps[-1]
        knots_t.append(last.strike)
        knots_z.append(self.h_td[last.side] - off(last.strike, last.side))
        knots_v.append(v_td)
        knots_a.append(-GRAVITY)
        self.pelvis_z = _QuinticKeys(knots_t, knots_z, knots_v, knots_a)

        # Per-stride swing targets with natural variation; asymmetry on one side.
        for st in steps:
            asym = spec.asymmetry_side == st.side
            st.hip_deficit = spec.hip_flexion_deficit_deg * _DEG if asym else 0.0
            st.knee_deficit = spec.knee_extension_deficit_deg * _DEG if asym else 0.0
            st.hip_peak = d.hip_peak + 1.2 * _DEG * jitter * rng.standard_normal()
            st.knee_peak = d.knee_peak + 2.0 * _DEG * jitter * rng.standard_normal()
            rng.standard_normal()  # (was the late-swing knee minimum's variation; keeps the random stream)
            st.ankle_peak = 8.0 * _DEG + 1.5 * _DEG * jitter * rng.standard_normal()
        self._build_legs()

    # -- pelvis
    def pelvis_angles(self, t):
        ph = self.phase(t)
        pitch = self.design.pelvis_tilt + 1.5 * _DEG * np.cos(4 * np.pi * ph)
        roll = 3.0 * _DEG * np.sin(2 * np.pi * ph)
        yaw = 5.0 * _DEG * np.cos(2 * np.pi * ph)
        return pitch, roll, yaw

    def pelvis_axes(self, t):
        return _pelvis_axes(*self.pelvis_angles(t))

    def _hip_offset(self, t, side):
        """Hip centre offset from mid-ASIS in the lab; side None = mean of both hips."""
        axes = self.pelvis_axes(t)
        if side is None:
            return 0.5 * (axes @ self.hip_local["right"] + axes @ self.hip_local["left"])
        return axes @ self.hip_local[side]

    def _right_weight(self, t):
        """1 in right stance, 0 in left stance, C2 smooth in between (for the pelvis side-to-side position)."""
        w = np.zeros_like(t, dtype=float)
        for i, st in enumerate(self.steps):
            stance = (t >= st.strike) & (t <= st.toe_off)
            w[stance] = 1.0 if st.side == "right" else 0.0
            nxt = self.steps[i + 1].strike if i + 1 < len(self.steps) else st.toe_off + 1.0
            flight = (t > st.toe_off) & (t < nxt)
            ramp = _smoothstep5((t[flight] - st.toe_off) / (nxt - st.toe_off))
            w[flight] = 1.0 - ramp if st.side == "right" else ramp
        before = t < self.steps[0].strike
        w[before] = 0.0
        return w

    def pelvis_origin(self, t):
        t = np.asarray(t, dtype=float)
        axes = self.pelvis_axes(t)
        lateral = {s: -(axes @ self.hip_local[s])[:, 1] + self.hip_local[s][2] * -1.0 for s in SIDES}
        w = self._right_weight(t)
        y = w * lateral["right"] + (1.0 - w) * lateral["left"]
        return np.stack([self.v * t, y, self.pelvis_z(t)], axis=-1)

    def hip(self, t, side):
        t = np.asarray(t, dtype=float)
        return self.pelvis_origin(t) + self.pelvis_axes(t) @ self.hip_local[side]

    # -- legs
    def _stance_pitches(self, t, st: _Step):
        """Thigh, shank, foot pitch in stance: toe pinned at contact_x, planar IK."""
        t = np.asarray(t, dtype=float)
        phi_f = st.stance_pitch((t - st.strike) / (st.toe_off - st.strike))
        hip = self.hip(t, st.side)
        toe = np.stack([np.full_like(t, st.contact_x), np.zeros_like(t)], axis=-1)
        ankle = toe - _rot2(phi_f, self.toe_local[st.side])
        phi_t, phi_s = _two_link_ik(ankle - hip[:, [0, 2]], self.body)
        return np.stack([phi_t, phi_s, phi_f], axis=-1)

    def _stance_roll(self, st: _Step, heel_drop_rate: float, heel_drop_acc: float) -> "_QuinticKeys":
        """Foot pitch over stance fraction 0..1: at strike the heel drops at ``heel_drop_rate`` (rad/s) with the
        given angular acceleration (held for the first 15 % of stance), then the roll-over key values to toe-off."""
        d = self.design
        knots = [0.0, 0.4, 0.75, 1.0]
        roll = CubicSpline(knots, [d.pitch_td, -6.0 * _DEG, -22.0 * _DEG, d.pitch_to])
        ct = st.toe_off - st.strike
        w0, a0, tau = heel_drop_rate * ct, heel_drop_acc * ct * ct, 0.15
        return _QuinticKeys([0.0, tau] + knots[1:], [d.pitch_td, d.pitch_td + w0 * tau + 0.5 * a0 * tau * tau]
                            + list(roll(knots[1:])), [w0, w0 + a0 * tau] + list(roll(knots[1:], 1)),
                            [a0, a0] + list(roll(knots[1:], 2)))

    def _build_legs(self):
        d = self.design
        # Stance: contact point from the strike configuration, foot pitch roll-over.
        for st in self.steps:
            st.contact_x = self.hip(np.array([st.strike]), st.side)[0, 0] + self.td_reach[st.side][0]
            st.stance_pitch = self._stance_roll(st, d.heel_drop_rate, 0.0)
        # Swing: from each toe-off to the same side's next strike. The hip extends from its peak to the strike at
        # a constant angular acceleration; the coming stance starts with that acceleration of the thigh (set by
        # the foot's acceleration at strike, in which the thigh's is linear: two trials).
        self.swings = []
        by_side = {s: [st for st in self.steps if st.side == s] for s in SIDES}
        thigh_acc = lambda st: _derivatives(lambda t: self._stance_pitches(t, st), st.strike)[2][0]
        for side in SIDES:
            seq = by_side[side]
            for st, nxt in zip(seq[:-1], seq[1:]):
                # heel-drop rate at strike that gives the thigh the rate for a hip-flexion peak at s_hip_peak of
                # the swing (the hip rate at strike is linear in it: two trials)
                delta = st.hip_peak - self._hip_plan(st, nxt)[0]
                target_rate = -2.0 * delta / ((1.0 - d.s_hip_peak) * (nxt.strike - st.toe_off))
                # (a jog's longer contact takes the heel down more slowly: the rates scale with the sprint's
                # 0.13 s contact over this one, so the heel does not outrun the hip; 1 for every sprint)
                slow = min(1.0, 0.13 / (nxt.toe_off - nxt.strike))
                rates = []
                for trial in (8.0 * slow, 16.0 * slow):
                    nxt.stance_pitch = self._stance_roll(nxt, trial, 0.0)
                    rates.append(self._hip_plan(st, nxt)[1])
                drop = float(np.clip(slow * (8.0 + 8.0 * (target_rate - rates[0]) / (rates[1] - rates[0])),
                                     4.0 * slow, 24.0 * slow))
                target = self._hip_plan(st, nxt)[2] + _derivatives(
                    lambda t: self.pelvis_angles(np.asarray(t))[0], nxt.strike)[2]
                trials = []
                for trial in (0.0, -1000.0):
                    nxt.stance_pitch = self._stance_roll(nxt, drop, trial)
                    trials.append(thigh_acc(nxt))
                acc = -1000.0 * (target - trials[0]) / (trials[1] - trials[0])
                nxt.stance_pitch = self._stance_roll(nxt, drop, acc)
                self.swings.append(self._swing(st, nxt))

    def _hip_plan(self, st: _Step, nxt: _Step):
        """Hip flexion at strike, its rate there and the constant acceleration from the swing's peak to strike."""
        pelvis_pitch = lambda t: self.pelvis_angles(np.asarray(t))[0]
        p1, dp1, _ = _derivatives(lambda t: self._stance_pitches(t, nxt), nxt.strike)
        pp1, dpp1, _ = _derivatives(pelvis_pitch, nxt.strike)
        hip_td, rate_td = p1[0] - pp1, dp1[0] - dpp1
        return hip_td, rate_td, -rate_td ** 2 / (2.0 * (st.hip_peak - hip_td))

    def _swing(self, st: _Step, nxt: _Step):
        d = self.design
        t0, t1 = st.toe_off, nxt.strike
        dur = t1 - t0
        pelvis_pitch = lambda t: self.pelvis_angles(np.asarray(t))[0]
        # start: stance state at toe-off (hip, knee and ankle angles and their rates, rad/s): a C1 join, the
        # acceleration steps there (the toe's lift, a jerk peak)
        p, dp, _ = _derivatives(lambda t: self._stance_pitches(t, st), t0)
        pp, dpp, _ = _derivatives(pelvis_pitch, t0)
        start = np.array([p[0] - pp, p[0] - p[1], p[2] - p[1]])
        rate0 = np.array([dp[0] - dpp, dp[0] - dp[1], dp[2] - dp[1]])
        # end: the strike configuration with the rates the stance starts with (toe pinned, the stance's foot
        # pitch), so thigh and shank run on into stance; only the foot turns toe-up faster in stance than at the
        # end of swing, which brings the toe down onto the ground (see _landing_pitches)
        pp1, dpp1, _ = _derivatives(pelvis_pitch, t1)
        p1, dp1, _ = _derivatives(lambda t: self._stance_pitches(t, nxt), t1)
        end = np.array([p1[0] - pp1, p1[0] - p1[1], p1[2] - p1[1]])
        end_rate = np.array([dp1[0] - dpp1, dp1[0] - dp1[1], dp1[2] - d.touchdown_foot_rate - dp1[1]])

        # Time x since toe-off (s). Hip flexion: up to its peak along the least-effort curve (the least integral of
        # the squared angular acceleration, see _least_effort), then extends into the strike at the constant
        # acceleration that joins the peak to the strike state (the least that does; on that piece the least-effort
        # curve, a cubic, is this parabola), the two joined with the same acceleration at the peak (C2). The earlier
        # design (a constant acceleration then a constant deceleration to each peak) asked at 9 m/s for 944 deg/s of
        # hip and 1670 deg/s of knee flexion and 6.1 J/kg of positive hip and 4.1 J/kg of negative knee work per
        # swing, 40 % above sprinters' (Nagahara et al. 2017); this one 790 and 1440 deg/s, 5.4 and 3.5 J/kg.
        hip_td, hip_rate_td, hip_acc = self._hip_plan(st, nxt)
        x_hip = dur - hip_rate_td / hip_acc
        hip_x = _Spliced([0.0, x_hip], [_least_effort([0.0, x_hip], [start[0], st.hip_peak], [rate0[0], 0.0],
                                                      [None, hip_acc]),
                                        lambda x: st.hip_peak + 0.5 * hip_acc * (x - x_hip) ** 2])
        # knee flexion: from toe-off up to its early-swing peak (rate 0), then extends and flexes again into the
        # strike state, all along one least-effort curve (C2, no steps of angular acceleration, which at the hip's
        # peak made a mid-swing spike of the hip moment) whose acceleration at strike is that of a two-piece plan:
        # the knee's extension speeding up to the hip's peak (x_hip), then slowing down and turning into the flexion
        # rate the stance starts with, under two constant accelerations -a1, +a2 (v = -a1 T1 + a2 T2, p = peak - a1
        # (T1^2 / 2 + T1 T2) + a2 T2^2 / 2, linear in a1, a2); where that has no solution, two of equal size switching
        # where they meet (brentq). The strike acceleration keeps the terminal-swing demand at what that plan asks
        # (a free one puts the knee's largest flexion acceleration, and the hip's extension moment, at the strike).
        knee_td, knee_rate_td = end[1] - st.knee_deficit, max(end_rate[1], 1.0)
        x_pk = d.s_knee_peak * dur
        tau_pk = x_pk - dur

        def mismatch(tau_v):
            acc_ = -knee_rate_td / (2.0 * tau_v - tau_pk)
            return (st.knee_peak - 0.5 * acc_ * (tau_v - tau_pk) ** 2
                    - (knee_td + knee_rate_td * tau_v + 0.5 * acc_ * tau_v * tau_v))

        landing_acc = -knee_rate_td / (2.0 * brentq(mismatch, tau_pk * (1 - 1e-9), 0.5 * tau_pk * (1 + 1e-6)) - tau_pk)
        if x_pk < x_hip < dur:
            t1_, t2_ = x_hip - x_pk, dur - x_hip
            a1, a2 = np.linalg.solve([[-t1_, t2_], [-(0.5 * t1_ ** 2 + t1_ * t2_), 0.5 * t2_ ** 2]],
                                     [knee_rate_td, knee_td - st.knee_peak])
            if a1 > 0.0 and a2 > 0.0:
                landing_acc = a2
        knee_x = _least_effort([0.0, x_pk, dur], [start[1], st.knee_peak, knee_td], [rate0[1], 0.0, knee_rate_td],
                               [None, None, landing_acc])
        # ankle (relative foot pitch): plantar flexion eases off to a small dorsiflexion peak in mid swing, then
        # plantar flexes to a late minimum from which it dorsiflexes into the strike at a constant acceleration
        ankle_rate_td = end_rate[2]
        ankle_acc = max(d.ankle_acc_td, ankle_rate_td ** 2 / (2.0 * (end[2] - d.ankle_floor)))
        x_amin = dur - ankle_rate_td / ankle_acc
        ankle_min = end[2] - ankle_rate_td ** 2 / (2.0 * ankle_acc)
        early_ankle = CubicSpline([0.0, 0.3 * dur, 0.6 * dur], [start[2], 0.0, st.ankle_peak],
                                  bc_type=((1, rate0[2]), (1, 0.0)))
        mid_ankle = _QuinticKeys([0.6 * dur, x_amin], [st.ankle_peak, ankle_min], [0.0, 0.0],
                                 [float(early_ankle(0.6 * dur, 2)), ankle_acc])

        def ankle_x(x):
            x = np.asarray(x, dtype=float)
            late = end[2] + ankle_rate_td * (x - dur) + 0.5 * ankle_acc * (x - dur) ** 2
            return np.where(x < 0.6 * dur, early_ankle(x), np.where(x < x_amin, mid_ankle(x), late))

        # asymmetry: the hip-flexion deficit holds from the hip's peak through late swing and is released just
        # before strike (the leg lands as the other one does); the knee-extension deficit holds from the knee's
        # peak on (the leg lands with the knee flexed by it)
        def hip_deficit(x):
            rise = _smoothstep5((x - 0.15 * dur) / (x_hip - 0.15 * dur))
            return st.hip_deficit * rise * (1.0 - _smoothstep5((x - dur + d.deficit_release_s) / d.deficit_release_s))

        def knee_deficit(x):
            return st.knee_deficit * _smoothstep5((x - x_pk) / (0.6 * dur - x_pk))

        hip = lambda s_: hip_x(np.asarray(s_) * dur) - hip_deficit(np.asarray(s_) * dur)
        knee = lambda s_: knee_x(np.asarray(s_) * dur) + knee_deficit(np.asarray(s_) * dur)
        ankle = lambda s_: ankle_x(np.asarray(s_) * dur)
        return {"side": st.side, "t0": t0, "t1": t1, "hip": hip, "knee": knee, "ankle": ankle, "next": nxt}

    def _swing_pitches(self, t, sw):
        t = np.asarray(t, dtype=float)
        s = (t - sw["t0"]) / (sw["t1"] - sw["t0"])
        phi_t = self.pelvis_angles(t)[0] + sw["hip"](s)
        phi_s = phi_t - sw["knee"](s)
        return np.stack([phi_t, phi_s, phi_s + sw["ankle"](s)], axis=-1)

    def _landing_pitches(self, t, sw, window: float):
        """Last ``window`` s before strike: the toe height blends (quintic smoothstep) from the swing's to zero and
        the foot pitch is solved from it, thigh and shank staying on their swing paths (which end in the stance's
        state). The light foot turns toe-up onto the ground: the toe's descent stops sharply (a clear upward
        acceleration peak at touchdown) without an impact in thigh and shank."""
        t = np.asarray(t, dtype=float)
        toe_l = self.toe_local[sw["side"]]
        swing = self._swing_pitches(t, sw)
        hip_z = self.hip(t, sw["side"])[:, 2]
        _, ankle, toe = _planar_leg(*swing.T, self.body, toe_l)
        toe_height = (1.0 - _smoothstep5((t - (sw["t1"] - window)) / window)) * (hip_z + toe[:, 1])
        # toe height = ankle_z + toe_x sin(phi) + toe_y cos(phi) = ankle_z + R sin(phi + delta)
        radius, delta = np.hypot(toe_l[0], toe_l[1]), np.arctan2(toe_l[1], toe_l[0])
        phi_f = np.arcsin(np.clip((toe_height - hip_z - ankle[:, 1]) / radius, -1.0, 1.0)) - delta
        return np.stack([swing[:, 0], swing[:, 1], phi_f], axis=-1)

    def leg_pitches(self, t, side):
        """Absolute thigh, shank and foot pitch [n, 3] of one leg at times t (ground frame)."""
        t = np.asarray(t, dtype=float)
        landing_window = self.design.landing_window
        out = np.full((len(t), 3), np.nan)
        for st in self.steps:
            if st.side != side:
                continue
            m = (t >= st.strike) & (t <= st.toe_off)
            if m.any():
                out[m] = self._stance_pitches(t[m], st)
        for sw in self.swings:
            if sw["side"] != side:
                continue
            m = (t > sw["t0"]) & (t < sw["t1"] - landing_window)
            if m.any():
                out[m] = self._swing_pitches(t[m], sw)
            m = (t >= sw["t1"] - landing_window) & (t < sw["t1"])
            if m.any():
                out[m] = self._landing_pitches(t[m], sw, landing_window)
        if np.isnan(out).any():
            raise HamstrideError("the simulated step timeline does not cover the whole trial", code="synth")
        return out

    def events(self, t_end: float):
        fs = {s: np.array([st.strike for st in self.steps if st.side == s and 0.0 <= st.strike <= t_end])
              for s in SIDES}
        to = {s: np.array([st.toe_off for st in self.steps if st.side == s and 0.0 <= st.toe_off <= t_end])
              for s in SIDES}
        return fs, to


# ------------------------------------------------------------------------------------------------ kinematics -> truth
def _assemble(time_s: np.ndarray, rate_hz: float, body: AthleteBody, pelvis_origin: np.ndarray,
              pelvis_axes: np.ndarray, pitches: Mapping[str, np.ndarray], *, include_medial: bool,
              include_clusters: bool, speed: float, treadmill: bool, strikes, toe_offs, belt: float = 0.0
              ) -> tuple[tuple[str, ...], np.ndarray, SprintTruth]:
    """Frames, landmarks, markers and JCS truth angles from pelvis pose and per-leg sagittal pitches."""
    origins = {"pelvis": pelvis_origin}
    axes = {"pelvis": pelvis_axes}
    centres: dict[str, np.ndarray] = {}
    landmarks: dict[str, np.ndarray] = {}
    markers: dict[str, np.ndarray] = {}
    angles: dict[str, dict[str, np.ndarray]] = {}
    for side in SIDES:
        local = _segment_local(body, side)
        hip = pelvis_origin + pelvis_axes @ hip_centre_local(body, side)
        phi_t, phi_s, phi_f = pitches[side].T
        thigh_ax, shank_ax, foot_ax = _sagittal_axes(phi_t), _sagittal_axes(phi_s), _sagittal_axes(phi_f)
        knee = hip - body.thigh_length_m * thigh_ax[:, :, 1]
        ankle = knee - body.shank_length_m * shank_ax[:, :, 1]
        for seg, org, ax in (("thigh", hip, thigh_ax), ("shank", knee, shank_ax), ("foot", ankle, foot_ax)):
            origins[f"{side}_{seg}"] = org
            axes[f"{side}_{seg}"] = ax
        centres.update({f"{side}_hip": hip, f"{side}_knee": knee, f"{side}_ankle": ankle})
        for seg, org, ax in (("pelvis", pelvis_origin, pelvis_axes), ("thigh", hip, thigh_ax),
                             ("shank", knee, shank_ax), ("foot", ankle, foot_ax)):
            for name, p in local[seg].items():
                xyz = org + ax @ p
                if name in LANDMARK_LABELS:
                    landmarks[f"{side}_{name}"] = xyz
                    markers[f"{side[0]}.{LANDMARK_LABELS[name]}"] = xyz
                else:
                    markers[f"{side[0]}.{name}"] = xyz
        mirror = 1.0 if side == "right" else -1.0
        hf, ha, hr = jcs_zxy(pelvis_axes, thigh_ax)
        kf, _, _ = jcs_zxy(thigh_ax, shank_ax)
        af, _, _ = jcs_zxy(shank_ax, foot_ax)
        angles[side] = {"hip_flexion": hf, "hip_adduction": mirror * ha, "hip_rotation": mirror * hr,
                        "knee_flexion": -kf, "ankle_dorsiflexion": af}
    labels = marker_labels(include_medial, include_clusters)
    xyz = np.stack([markers[lab] for lab in labels], axis=1)
    truth = SprintTruth(time_s=time_s, rate_hz=rate_hz, angles=angles, foot_strikes_s=strikes, toe_offs_s=toe_offs,
                        speed_m_s=speed, treadmill=treadmill, body=body, landmarks_lab=landmarks,
                        markers_lab=markers, origins=origins, axes=axes, joint_centres=centres, belt_speed_m_s=belt)
    return labels, xyz, truth


_UNIT_SCALE = {"mm": 1000.0, "cm": 100.0, "m": 1.0}


def lab_to_file(xyz: np.ndarray, vertical_axis: str = "z", travel_sign: int = 1, units: str = "mm") -> np.ndarray:
    """Internal lab (x forward, y left, z up; m) -> file axes and units (right-handed in both cases)."""
    if units not in _UNIT_SCALE:
        raise ConfigError(f"units must be 'mm', 'cm' or 'm', not {units!r}")
    s = 1.0 if travel_sign >= 0 else -1.0
    x, y, z = xyz[..., 0], xyz[..., 1], xyz[..., 2]
    if vertical_axis == "z":
        out = np.stack([s * x, s * y, z], axis=-1)
    elif vertical_axis == "y":
        out = np.stack([s * x, z, -s * y], axis=-1)
    else:
        raise ConfigError(f"vertical_axis must be 'z' or 'y', not {vertical_axis!r}")
    return out * _UNIT_SCALE[units]


def _noise_and_gaps(xyz: np.ndarray, noise_mm: float, n_gaps: int, rng: np.random.Generator) -> np.ndarray:
    out = xyz + rng.normal(0.0, noise_mm / 1000.0, xyz.shape)
    n_frames, n_markers = xyz.shape[:2]
    for _ in range(n_gaps):
        if n_frames < 30:
            break
        m = rng.integers(n_markers)
        length = int(rng.integers(2, 9))
        start = int(rng.integers(10, n_frames - 10 - length))
        out[start:start + length, m] = np.nan
    return out


# ------------------------------------------------------------------------------------------------ public API
def _check_spec(spec: SprintSpec) -> None:
    if not 2.5 <= spec.speed_m_s <= 10.5:
        raise ConfigError(f"speed {spec.speed_m_s} m/s is not a running speed the simulator covers (2.5-10.5 m/s: "
                          "jogging below 6 m/s, sprinting above)")
    if spec.asymmetry_side not in (None, "left", "right"):
        raise ConfigError("asymmetry_side must be None, 'left' or 'right'")
    if spec.rate_hz < 100.0 or spec.duration_s < 0.5:
        raise ConfigError("simulate at least 100 Hz and 0.5 s")
    if spec.vertical_axis not in ("z", "y") or spec.units not in _UNIT_SCALE:
        raise ConfigError("vertical_axis must be 'z' or 'y' and units 'mm', 'cm' or 'm'")


def simulate_sprint(spec: SprintSpec = SprintSpec()) -> tuple[tuple[str, ...], np.ndarray, SprintTruth]:
    """Simulate one sprint trial: (labels, xyz [F, M, 3] in FILE units/axes with noise and NaN gaps, truth)."""
    _check_spec(spec)
    rng = np.random.default_rng(spec.seed)
    gait = _Gait(spec, rng)
    n = int(round(spec.duration_s * spec.rate_hz))
    t = np.arange(n) / spec.rate_hz
    pitch = {s: gait.leg_pitches(t, s) for s in SIDES}
    origin = gait.pelvis_origin(t)
    axes = gait.pelvis_axes(t)
    belt = 0.0
    if spec.treadmill:
        belt = gait.v
        origin = origin - np.stack([gait.v * t, np.zeros_like(t), np.zeros_like(t)], axis=-1)
    strikes, toe_offs = gait.events(t[-1])
    labels, xyz, truth = _assemble(t, spec.rate_hz, spec.body, origin, axes, pitch,
                                   include_medial=spec.include_medial, include_clusters=spec.include_clusters,
                                   speed=gait.v, treadmill=spec.treadmill, strikes=strikes, toe_offs=toe_offs,
                                   belt=belt)
    if spec.full_body:
        thigh_down = {side: -truth.axes[f"{side}_thigh"][:, :, 1] for side in SIDES}
        upper = upper_body_markers(origin, axes, thigh_down, spec.body.height_m)
        labels = labels + tuple(upper)
        xyz = np.concatenate([xyz, np.stack(list(upper.values()), axis=1)], axis=1)
    extra = np.random.default_rng([spec.seed, 13])  # a stream of its own: the sprint's own draws stay the same
    if spec.soft_tissue_mm > 0.0:
        xyz = _soft_tissue(labels, xyz, truth, spec.soft_tissue_mm / 1000.0, extra)
    noisy = _noise_and_gaps(xyz, spec.noise_mm, spec.n_gaps, rng)
    if spec.capture_volume_m is not None and not spec.treadmill:
        noisy = _capture_volume(noisy, spec.capture_volume_m, extra)
    if not spec.include_knee_ankle:
        keep = [i for i, label in enumerate(labels) if not label.split(".", 1)[-1].startswith(("knee.", "ankle."))]
        labels, noisy = tuple(labels[i] for i in keep), noisy[:, keep]
    if spec.label_prefix:
        labels = tuple(f"{spec.label_prefix}:{label}" for label in labels)
    return labels, lab_to_file(noisy, spec.vertical_axis, spec.travel_sign, spec.units), truth


def _capture_volume(xyz: np.ndarray, volume_m: tuple[float, float], rng: np.random.Generator) -> np.ndarray:
    """Markers seen only inside the capture volume along the travel (x, internal lab frame); NaN elsewhere, as a
    C3D file marks a point that no camera saw (residual -1). Each marker's edges move by up to +/-0.15 m."""
    start, end = volume_m
    shift = rng.uniform(-0.15, 0.15, size=(2, xyz.shape[1]))
    x = xyz[:, :, 0]
    inside = (x >= start + shift[0]) & (x <= end + shift[1])
    return np.where(inside[:, :, None], xyz, np.nan)


def _soft_tissue(labels, xyz: np.ndarray, truth: SprintTruth, amplitude_m: float,
                 rng: np.random.Generator) -> np.ndarray:
    """Move thigh and shank skin markers relative to the bone (soft-tissue artefact, invented shape): each marker
    slides along its own random direction in the segment frame by ``amplitude_m`` times the knee flexion (rad, over
    about 2 rad), and wobbles for about 60 ms after each foot strike of its leg (20 Hz, decaying), up to about
    ``amplitude_m``."""
    out = xyz.copy()
    t = truth.time_s
    for side in SIDES:
        knee = truth.angles[side]["knee_flexion"] / 2.0
        wobble = np.zeros_like(t)
        for strike in truth.foot_strikes_s[side]:
            after = np.clip(t - strike, 0.0, None)
            wobble += np.where(t >= strike, np.exp(-after / 0.03) * np.sin(2 * np.pi * 20.0 * after), 0.0)
        for seg in CLUSTER_SEGMENTS:
            axes = truth.axes[f"{side}_{seg}"]
            sites = ("knee.", "thigh.") if seg == "thigh" else ("ankle.", "shank.")
            for i, label in enumerate(labels):
                if not (label.startswith(side[0] + ".") and label[2:].startswith(sites)):
                    continue
                glide, shake = rng.normal(size=3), rng.normal(size=3)
                glide /= np.linalg.norm(glide)
                shake /= np.linalg.norm(shake)
                local = amplitude_m * (knee[:, None] * glide + wobble[:, None] * shake)
                out[:, i] += np.einsum("fij,fj->fi", axes, local)
    return out


def simulate_walk(body: AthleteBody = _DEFAULT_BODY, speed_m_s: float = 1.3, rate_hz: float = 250.0,
                  duration_s: float = 3.0, *, stride_time_s: float = 1.08, stance_fraction: float = 0.62,
                  noise_mm: float = 0.5, seed: int = 0, vertical_axis: str = "z", travel_sign: int = 1,
                  units: str = "mm") -> tuple[tuple[str, ...], np.ndarray, SprintTruth]:
    """A walking trial (no flight: each foot is on the ground about 62 % of the stride, both feet together twice
    per stride for about 12 % each; textbook values: stance 60-62 %, double support about 10 % twice, e.g. Perry &
    Burnfield, Gait Analysis, 2010 [M, consistent with secondary sources]), for the refusal of walks.

    Simpler than the sprint: each foot rolls heel -> flat -> forefoot on the ground (pitch +15 deg at heel strike to
    -35 deg at toe-off) and swings forward along a smooth arc; thigh and shank come from planar inverse kinematics of
    hip to ankle, the pelvis height kept where both legs reach. Same labels and file conventions as the sprint.
    """
    rng = np.random.default_rng(seed)
    n = int(round(duration_s * rate_hz))
    t = np.arange(n) / rate_hz
    lt, ls = body.thigh_length_m, body.shank_length_m
    stride = speed_m_s * stride_time_s
    foot = _foot_local(body, "right")
    heel_l, met_l = foot["heel"][:2], foot["first_metatarsal"][:2]
    pitch_hs, pitch_to = 15.0 * _DEG, -35.0 * _DEG
    zero = np.zeros(n)
    pelvis_axes = _pelvis_axes(-10.0 * _DEG + zero, zero, zero)
    ankles, pitches = {}, {}
    for side, lag in (("right", 0.0), ("left", 0.5)):
        phase = (t / stride_time_s + lag) % 1.0
        cycle = np.floor(t / stride_time_s + lag)
        heel_x = (cycle - lag) * stride + 0.30  # heel strike 0.30 m ahead of where the hip is then
        u = phase / stance_fraction
        stance = u <= 1.0
        # foot pitch in stance: heel rocker (to flat by 15 %), flat, forefoot rocker (from 60 % to toe-off)
        pitch = np.where(u < 0.15, pitch_hs * (1.0 - _smoothstep5(u / 0.15)),
                         np.where(u < 0.6, 0.0, pitch_to * _smoothstep5((u - 0.6) / 0.4)))
        met_x = heel_x + (met_l[0] - heel_l[0])
        on_heel = pitch >= 0.0
        pivot = np.stack([np.where(on_heel, heel_x, met_x), zero], axis=-1)
        local = np.where(on_heel[:, None], heel_l, met_l)
        ankle_st = pivot - _rot2(pitch, local.T)
        # swing: from the toe-off ankle position to the next heel strike's, along a raised arc
        w = np.clip((phase - stance_fraction) / (1.0 - stance_fraction), 0.0, 1.0)
        ankle_to = np.stack([met_x, zero], axis=-1) - _rot2(np.full(n, pitch_to), met_l)
        ankle_hs = np.stack([heel_x + stride, zero], axis=-1) - _rot2(np.full(n, pitch_hs), heel_l)
        blend = _smoothstep5(w)[:, None]
        ankle_sw = ankle_to + (ankle_hs - ankle_to) * blend
        ankle_sw[:, 1] += 0.06 * np.sin(np.pi * w)
        pitch_sw = pitch_to + (pitch_hs - pitch_to) * _smoothstep5(w)
        ankles[side] = np.where(stance[:, None], ankle_st, ankle_sw)
        pitches[side] = np.where(stance, pitch, pitch_sw)
    hip_local = {s: hip_centre_local(body, s) for s in SIDES}
    x = speed_m_s * t
    # pelvis height: as high as 98.5 % of the leg's reach allows for both legs (lowest in double support)
    reach = 0.985 * (lt + ls)
    allowed = []
    for side in SIDES:
        hip_dx = x + (pelvis_axes @ hip_local[side])[:, 0] - ankles[side][:, 0]
        allowed.append(ankles[side][:, 1] + np.sqrt(np.clip(reach ** 2 - hip_dx ** 2, 0.0, None))
                       - (pelvis_axes @ hip_local[side])[:, 2])
    z = np.minimum(*allowed)
    z = np.minimum(np.convolve(np.pad(z, 12, mode="edge"), np.ones(25) / 25.0, mode="valid"), z)
    origin = np.stack([x, zero, z], axis=-1)
    leg_pitches = {}
    for side in SIDES:
        hip = origin + pelvis_axes @ hip_local[side]
        phi_t, phi_s = _two_link_ik(ankles[side] - hip[:, [0, 2]], body)
        leg_pitches[side] = np.stack([phi_t, phi_s, pitches[side]], axis=-1)
    labels, xyz, truth = _assemble(t, rate_hz, body, origin, pelvis_axes, leg_pitches, include_medial=True,
                                   include_clusters=True, speed=speed_m_s, treadmill=False,
                                   strikes={s: np.zeros(0) for s in SIDES}, toe_offs={s: np.zeros(0) for s in SIDES})
    noisy = _noise_and_gaps(xyz, noise_mm, 0, rng)
    return labels, lab_to_file(noisy, vertical_axis, travel_sign, units), truth


def sprint_events(truth: SprintTruth) -> list[tuple[str, str, float]]:
    """Truth events as (label, context, time_s) for the C3D EVENT group."""
    events = []
    for side in SIDES:
        ctx = side.capitalize()
        events += [("Foot Strike", ctx, float(x)) for x in truth.foot_strikes_s[side]]
        events += [("Toe Off", ctx, float(x)) for x in truth.toe_offs_s[side]]
    return sorted(events, key=lambda e: e[2])


def _subject(body: AthleteBody, name: str) -> dict[str, object]:
    return {"name": name, "body_mass_kg": body.mass_kg, "height_m": body.height_m}


def write_sprint_trial(path: str | Path, spec: SprintSpec = SprintSpec()) -> SprintTruth:
    """Simulate a sprint and write it as a C3D file (hamstride.io.write_c3d); returns the truth."""
    from .c3d import write_c3d

    labels, xyz, truth = simulate_sprint(spec)
    events = sprint_events(truth) if spec.include_events else ()
    subject = _subject(spec.body, spec.athlete)
    units = spec.units
    if spec.nul_padding:  # C-string padding some capture systems write (ezc3d writes these NUL bytes as given;
        pad = "\x00" * spec.nul_padding  # padded events and subject names: tests/c3d_bytes.py writes those)
        labels = tuple(label + pad for label in labels)
        units = units + pad
    write_c3d(path, labels, xyz, spec.rate_hz, units=units, events=events, subject=subject)
    return truth


# ------------------------------------------------------------------------------------------------ real-capture shapes
#: Trunk, head and arm markers of a full-body set (our own labels), in the pelvis frame (x anterior, y up, z right;
#: metres for a 1.80 m athlete, origin mid-ASIS). Invented placement at typical adult proportions (common practice).
UPPER_BODY_SITES = {
    "trunk.neck": (-0.13, 0.50, 0.0), "trunk.chest": (0.06, 0.36, 0.0), "trunk.back": (-0.15, 0.30, 0.0),
    "r.shoulder": (-0.04, 0.47, 0.19), "l.shoulder": (-0.04, 0.47, -0.19),
    "head.front": (0.06, 0.70, 0.0), "head.back": (-0.13, 0.71, 0.0),
    "head.r": (-0.03, 0.68, 0.08), "head.l": (-0.03, 0.68, -0.08),
}
UPPER_ARM_M, FOREARM_M = 0.30, 0.27  # for a 1.80 m athlete: about 0.17 and 0.15 of height (de Leva 1996; from memory)
TRUNK_LEAN_RAD = 12.0 * _DEG  # forward lean of the trunk over the pelvis when running (common practice)


def upper_body_markers(pelvis_origin: np.ndarray, pelvis_axes: np.ndarray, thigh_down: Mapping[str, np.ndarray],
                       height_m: float = 1.80) -> dict[str, np.ndarray]:
    """Trunk, head and arm markers [F, 3] (lab frame) above a pelvis pose: trunk and head lean forward with the
    pelvis; each arm swings against its own leg (the upper arm mirrors the thigh's fore-aft direction at 0.8 of its
    swing) with the elbow bent 90 degrees. Labels: UPPER_BODY_SITES, then per arm upperarm, elbow, elbow.in,
    forearm, wrist.out, wrist.in and hand (23 markers in all, more than the legs and pelvis carry without clusters)."""
    k = height_m / 1.80
    c, s = np.cos(TRUNK_LEAN_RAD), np.sin(TRUNK_LEAN_RAD)
    out: dict[str, np.ndarray] = {}
    for label, (x, y, z) in UPPER_BODY_SITES.items():
        local = k * np.array([x * c + y * s, -x * s + y * c, z])  # lean: the higher a point, the further forward
        out[label] = pelvis_origin + pelvis_axes @ local
    for side in SIDES:
        d = np.asarray(thigh_down[side], float)
        lateral = _RIGHT_SIGN[side] * pelvis_axes[:, :, 2]  # away from the body on this side
        arm = np.stack([-0.8 * d[:, 0], d[:, 1], d[:, 2] - 0.3], axis=-1)  # swings against the leg, hangs down
        arm /= np.linalg.norm(arm, axis=1, keepdims=True)
        forearm = np.stack([-arm[:, 2], np.zeros(len(arm)), arm[:, 0]], axis=-1)  # arm turned 90 deg forward
        s_ = side[0]
        shoulder = out[f"{s_}.shoulder"]
        elbow = shoulder + k * UPPER_ARM_M * arm
        wrist = elbow + k * FOREARM_M * forearm
        out[f"{s_}.upperarm"] = shoulder + 0.55 * k * UPPER_ARM_M * arm + 0.04 * k * lateral
        out[f"{s_}.elbow"] = elbow + 0.035 * k * lateral
        out[f"{s_}.elbow.in"] = elbow - 0.035 * k * lateral
        out[f"{s_}.forearm"] = elbow + 0.5 * k * FOREARM_M * forearm + 0.03 * k * lateral
        out[f"{s_}.wrist.out"] = wrist + 0.025 * k * lateral
        out[f"{s_}.wrist.in"] = wrist - 0.025 * k * lateral
        out[f"{s_}.hand"] = wrist + 0.08 * k * forearm
    return out


def simulate_static(body: AthleteBody = _DEFAULT_BODY, rate_hz: float = 250.0, duration_s: float = 1.0, *,
                    vertical_axis: str = "z", travel_sign: int = 1, units: str = "mm", noise_mm: float = 0.5,
                    include_clusters: bool = True, seed: int = 0
                    ) -> tuple[tuple[str, ...], np.ndarray, SprintTruth]:
    """Standing trial: pelvis level, legs vertical, feet flat on the ground, all joint angles zero; slight sway."""
    rng = np.random.default_rng(seed)
    n = int(round(duration_s * rate_hz))
    t = np.arange(n) / rate_hz
    zero = np.zeros(n)
    axes = _pelvis_axes(zero, zero, zero)
    plantar = -_foot_local(body, "right")["heel"][1]
    hip_height = body.thigh_length_m + body.shank_length_m + plantar
    sway = 0.002 * np.sin(2 * np.pi * 0.4 * t)
    origin = np.stack([sway, zero, hip_height - hip_centre_local(body, "right")[1] + zero], axis=-1)
    pitches = {s: np.zeros((n, 3)) for s in SIDES}
    empty = {s: np.zeros(0) for s in SIDES}
    labels, xyz, truth = _assemble(t, rate_hz, body, origin, axes, pitches, include_medial=True,
                                   include_clusters=include_clusters, speed=0.0, treadmill=False,
                                   strikes=empty, toe_offs=empty)
    noisy = _noise_and_gaps(xyz, noise_mm, 0, rng)
    return labels, lab_to_file(noisy, vertical_axis, travel_sign, units), truth


def write_static_trial(path: str | Path, body: AthleteBody = _DEFAULT_BODY, rate_hz: float = 250.0,
                       duration_s: float = 1.0, *, vertical_axis: str = "z", travel_sign: int = 1,
                       units: str = "mm", noise_mm: float = 0.5, seed: int = 0, athlete: str = "SYN01"
                       ) -> SprintTruth:
    """Write a standing calibration trial (all landmarks and clusters) as C3D; returns its truth."""
    from .c3d import write_c3d

    labels, xyz, truth = simulate_static(body, rate_hz, duration_s, vertical_axis=vertical_axis,
                                         travel_sign=travel_sign, units=units, noise_mm=noise_mm, seed=seed)
    write_c3d(path, labels, xyz, rate_hz, units=units, subject=_subject(body, athlete))
    return truth


# ------------------------------------------------------------------------------------------------ demo squad
@dataclass(frozen=True)
class _DemoTrialSet:
    session: str  # YYYY-MM-DD_label
    speeds: tuple[float, ...]
    hip_deficit_deg: float = 0.0
    knee_deficit_deg: float = 0.0


@dataclass(frozen=True)
class _DemoAthlete:
    code: str
    sex: str
    height_m: float
    mass_kg: float
    involved_side: str  # left / right / none
    injury_date: str
    sessions: tuple[_DemoTrialSet, ...]
    rate_hz: float = 250.0
    duration_s: float = 2.0
    treadmill: bool = False
    vertical_axis: str = "z"
    travel_sign: int = 1
    units: str = "mm"
    include_medial: bool = True
    events_in: tuple[str, ...] = ()  # trial file names that carry C3D events


# An invented club ("Riverside Flyers"); every code, body and date is fictional.
DEMO_SQUAD: tuple[_DemoAthlete, ...] = (
    _DemoAthlete("KT07", "male", 1.82, 78.0, "none", "", (_DemoTrialSet("2026-03-02_testing", (8.9, 9.0)),),
                 events_in=("sprint_01.c3d",)),
    _DemoAthlete("RB12", "male", 1.77, 73.5, "right", "2026-01-19", (
        # guarding: less late-swing knee extension only (the leg lands with the knee flexed by it); a hip-flexion
        # deficit with the same strike asks for 8-15 N m/kg of terminal-swing hip extension (tests/test_synth.py)
        _DemoTrialSet("2026-02-09_return1", (7.6, 7.8), 0.0, 10.0),
        _DemoTrialSet("2026-02-23_return2", (8.1, 8.3), 0.0, 5.0),
        _DemoTrialSet("2026-03-09_return3", (8.7, 8.8), 0.0, 1.0))),
    _DemoAthlete("MA03", "female", 1.68, 59.0, "none", "", (_DemoTrialSet("2026-03-02_testing", (8.0, 8.1)),),
                 rate_hz=300.0, vertical_axis="y"),
    _DemoAthlete("JS21", "male", 1.86, 82.0, "left", "2025-09-14",
                 (_DemoTrialSet("2026-03-04_treadmill", (7.5, 7.7)),), treadmill=True),
    _DemoAthlete("LV15", "female", 1.71, 62.0, "none", "", (_DemoTrialSet("2026-03-02_testing", (8.3, 8.4)),),
                 rate_hz=500.0, duration_s=1.6, include_medial=False),
    _DemoAthlete("DN09", "male", 1.79, 76.0, "none", "", (_DemoTrialSet("2026-03-02_testing", (9.1, 9.2)),),
                 rate_hz=300.0, travel_sign=-1, units="m", events_in=("sprint_02.c3d",)),
)


def write_demo_squad(root: str | Path) -> list[Path]:
    """Write the invented demo squad (athletes.csv and C3D trials) under ``root``; deterministic (fixed seeds).

    Layout as in design.md: ``root/<athlete>/<YYYY-MM-DD_label>/sprint_01.c3d, sprint_02.c3d, static.c3d``.
    RB12 returns from a right-side strain: three sessions two weeks apart, the right leg guarding with a late-swing
    knee-extension deficit that shrinks (10, 5, 1 deg) while speed rises; every leg's terminal-swing demand stays
    within the published sprint range (tests/test_synth.py). JS21 runs on a treadmill.
    Files vary in rate (250/300/500 Hz), vertical axis, travel direction and units, and two carry C3D events.
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    written: list[Path] = []
    table = root / "athletes.csv"
    with table.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(["athlete", "body_mass_kg", "height_m", "sex", "involved_side", "injury_date"])
        for a in DEMO_SQUAD:
            writer.writerow([a.code, f"{a.mass_kg:.1f}", f"{a.height_m:.2f}", a.sex, a.involved_side, a.injury_date])
    written.append(table)
    for i, a in enumerate(DEMO_SQUAD):
        body = AthleteBody.from_height(a.height_m, a.mass_kg, a.sex)
        for j, session in enumerate(a.sessions):
            folder = root / a.code / session.session
            for k, speed in enumerate(session.speeds):
                name = f"sprint_{k + 1:02d}.c3d"
                spec = SprintSpec(
                    speed_m_s=speed, rate_hz=a.rate_hz, duration_s=a.duration_s, treadmill=a.treadmill,
                    vertical_axis=a.vertical_axis, travel_sign=a.travel_sign, units=a.units,
                    asymmetry_side="right" if session.hip_deficit_deg or session.knee_deficit_deg else None,
                    hip_flexion_deficit_deg=session.hip_deficit_deg,
                    knee_extension_deficit_deg=session.knee_deficit_deg, include_medial=a.include_medial,
                    include_events=name in a.events_in, seed=1000 * i + 10 * j + k, body=body, athlete=a.code)
                write_sprint_trial(folder / name, spec)
                written.append(folder / name)
            static = folder / "static.c3d"
            write_static_trial(static, body, a.rate_hz, 1.0, vertical_axis=a.vertical_axis,
                               travel_sign=a.travel_sign, units=a.units, seed=1000 * i + 10 * j + 9, athlete=a.code)
            written.append(static)
    return written


# ------------------------------------------------------------------------------------------------ running feet
# A second generator, for foot strikes and toe-offs on real feet: each foot is a rigid body whose sole is a curved
# profile (a rounded heel pad, a flat midfoot and a rounded forefoot up to the toe tip) that rolls on the ground
# without slipping and sinks into it by the compression of heel pad and shoe (the vertical ground reaction force
# over a contact stiffness), with the skin markers wobbling after touchdown (soft tissue). The truth foot strike and
# toe-off are the instants the undeformed sole first touches and last leaves the floor, which is where the
# written force plates' vertical force rises from and falls back to zero. None of this is the event rules' own
# model (they see markers only): touchdown is a fall onto a curved, stiffening pad (the foot is stopped within the
# impact, not at a point of any marker), toe-off releases the rolling sole to the swing's lift; forefoot
# markers sit 2-3 cm above the floor in stance; the heel has a cluster of three markers and there is no toe marker
# by default; in some strides the forefoot marker levels off above the floor in late swing (a flat-foot landing)
# before the heel touches.
RUN_CONTACT_STIFFNESS_N_M = {"heel": 3.5e5, "forefoot": 4.5e5}  # pad + shoe, bulk (linear) part, invented
# The heel pad and shoe stiffen as they compress (the heel pad is strongly non-linear: Aerts et al. 1995, J Biomech
# 28:1299, from memory): a soft first few millimetres ("set", x_s, taken up over the first F_s newtons), then the
# bulk stiffness above; 8-12 mm at peak force in all. The soft start is what lets the foot arrive at the floor at
# the vertical speed runners' feet have (0.5-1.5 m/s for heel landings, from memory) and be stopped within the
# impact: in the two-mass model of Clark et al. 2017 (J Exp Biol 220:247, verified) the stance foot and shank,
# 0.08 of body mass, make the impact part of the force through their vertical deceleration (that they come to rest
# in the impact interval is from memory).
RUN_PAD_SET_M_N = {"heel": (0.004, 400.0), "forefoot": (0.003, 500.0)}  # (x_s m, F_s N), invented
# Vertical kinematics at the two contact ends (checked by tests/test_plates.py):
# - touchdown: in late swing the foot comes down with no vertical acceleration (nothing acts on it vertically
#   but gravity and the leg; common practice in impact models) and the floor's force starts at contact: the
#   foot's acceleration steps there (earlier generator: it was matched across touchdown, so no impact);
# - toe-off: once the toe is released the foot is lifted by the swinging shank; an upward acceleration of the
#   order of the shank's angular velocity squared times its length (about 8-20 rad/s x 0.43 m from jogging to
#   top speed, so 25-170 m/s^2; from memory, physics estimate) rather than the floor's rolling constraint.
RUN_TOE_OFF_PITCH_RATE_RAD_S = -3.0  # foot still pitching toe-down at toe-off (about -170 deg/s), invented
RUN_LIFT_ACC_M_S2 = (25.0, 50.0)  # upward foot acceleration just after toe-off at 3.5 and 9 m/s (linear in speed)


@dataclass(frozen=True)
class RunSpec:
    """What to simulate for the running-feet generator (overground or instrumented treadmill)."""

    speed_m_s: float = 3.5
    rate_hz: float = 250.0
    duration_s: float = 3.0
    treadmill: bool = False
    strike: str = "auto"  # 'heel', 'forefoot' or 'auto' (heel below 5 m/s, forefoot from 5 m/s)
    toe_marker: bool = False  # write a toe marker (most running marker sets have none)
    heel_cluster: bool = True  # three heel markers (r.heel, r.heel.up, r.heel.side) instead of one
    level_off_share: float = 0.35  # share of landings where the foot hovers flat just above the floor first
    plates: str = "none"  # 'none', 'overground' (two plates in the runway) or 'treadmill' (one plate per belt half)
    analog_rate_hz: float = 1000.0
    force_noise_n: float = 2.0
    noise_mm: float = 0.5
    soft_tissue_mm: float = 2.0  # amplitude of the markers' wobble after touchdown
    seed: int = 0
    body: AthleteBody = _DEFAULT_BODY
    athlete: str = "SYN02"


@dataclass(frozen=True)
class SimulatedPlate:
    """A force plate as written to the file: corners in the lab (m, [4, 3]) and the vertical force (N) at the
    analog rate."""

    corners_lab_m: np.ndarray
    vertical_force_n: np.ndarray


@dataclass(frozen=True)
class RunTruth:
    """Truth of a running-feet trial: contact instants from the contact model (s from the first frame)."""

    rate_hz: float
    speed_m_s: float
    treadmill: bool
    strike: str
    foot_strikes_s: Mapping[str, np.ndarray]
    toe_offs_s: Mapping[str, np.ndarray]
    level_off: Mapping[str, np.ndarray]  # bool per foot strike: the foot hovered above the floor before it
    plates: tuple[SimulatedPlate, ...]
    plate_contacts: Mapping[str, np.ndarray]  # side -> [n, 2] truth (strike, toe-off) of contacts wholly on a plate
    markers_lab: Mapping[str, np.ndarray]  # noise-free marker paths (m)


def _run_timing(speed: float) -> tuple[float, float]:
    """Contact time and stride time (s) at a running speed: contact 0.245 s at 3.5 m/s falling to 0.105 s at
    9 m/s, stride 0.72 s to 0.45 s (linear in speed between; from memory, after Weyand et al. 2000 and
    Cavanagh & Lafortune 1980 magnitudes)."""
    k = float(np.clip((speed - 3.5) / 5.5, -0.1, 1.2))
    return 0.245 - 0.140 * k, 0.72 - 0.27 * k


def _sole_profile(lf: float, n: int = 400) -> tuple[np.ndarray, np.ndarray, float]:
    """Sole points [n, 2] (x forward, z up; foot frame, origin ankle centre), their arc length and the ankle height:
    a heel pad arc (radius 0.13 foot length), a flat midfoot and a forefoot arc (radius 0.27 foot length, 60 deg)
    ending at the toe tip."""
    h_a = 0.28 * lf
    r_h, r_f = 0.13 * lf, 0.27 * lf
    x_h, x_m = -0.25 * lf + r_h, 0.48 * lf
    a = np.linspace(np.pi, 1.5 * np.pi, n // 3)
    heel = np.stack([x_h + r_h * np.cos(a), -h_a + r_h + r_h * np.sin(a)], axis=-1)
    flat = np.stack([np.linspace(x_h, x_m, n // 3), np.full(n // 3, -h_a)], axis=-1)[1:-1]
    b = np.linspace(1.5 * np.pi, 1.5 * np.pi + np.pi / 3, n - 2 * (n // 3) + 2)
    fore = np.stack([x_m + r_f * np.cos(b), -h_a + r_f + r_f * np.sin(b)], axis=-1)
    pts = np.concatenate([heel, flat, fore])
    arc = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(pts, axis=0), axis=1))])
    return pts, arc, h_a


def _foot_markers_local(lf: float, h_a: float, side: str, toe: bool, cluster: bool) -> dict[str, np.ndarray]:
    """Foot markers in the foot frame (x forward, y left, z up): skin markers 2-6 cm above the sole."""
    lat = -_RIGHT_SIGN[side]  # lab y of the lateral side: right foot lateral = -y
    back = -0.25 * lf
    out = {
        "heel": np.array([back - 0.008, lat * 0.004, -h_a + 0.030]),
        "met1": np.array([0.48 * lf, -lat * 0.033, -h_a + 0.026]),
        "met5": np.array([0.48 * lf - 0.025, lat * 0.036, -h_a + 0.021]),
        "ankle.lat": np.array([0.0, lat * 0.036, 0.0]),
        "ankle.med": np.array([0.005, -lat * 0.034, 0.006]),
    }
    if cluster:
        out["heel.up"] = np.array([back - 0.006, lat * 0.002, -h_a + 0.062])
        out["heel.side"] = np.array([back + 0.030, lat * 0.037, -h_a + 0.042])
    if toe:
        out["toe"] = np.array([0.72 * lf, -lat * 0.012, -h_a + 0.020])
    return out


class _RunFoot:
    """One foot's sagittal pose (ankle x, ankle z, pitch; pitch > 0 = toe up) over time, ground frame."""

    def __init__(self, lf: float, contacts: list[dict], body_weight_n: float):
        self.pts, self.arc, self.h_a = _sole_profile(lf)
        self.contacts = contacts
        self.w = body_weight_n
        self.swings = []
        heel_pt, met_pt = np.array([-0.25 * lf + 0.13 * lf, -self.h_a]), np.array([0.48 * lf, -self.h_a])
        self.heel_pt, self.met_pt = heel_pt, met_pt
        self.span = met_pt[0] - heel_pt[0]
        for c0, c1 in zip(contacts[:-1], contacts[1:]):
            self.swings.append(self._swing(c0, c1))

    # -- stance: pitch law, rolling contact, compression
    @staticmethod
    def pitch(c, u):
        return c["pitch_fun"](np.clip(u, 0.0, 1.0))

    def force(self, c, u):
        """Vertical ground reaction force (N) over stance fraction u (0 outside)."""
        u = np.asarray(u, float)
        inside = (u >= 0.0) & (u <= 1.0)
        uu = np.clip(u, 0.0, 1.0)
        impact = (uu / c["u_imp"]) * np.exp(1.0 - uu / c["u_imp"]) * (1.0 - uu)
        return np.where(inside, self.w * (c["a_act"] * np.sin(np.pi * uu) + c["b_imp"] * impact), 0.0)

    @staticmethod
    def compression(c, f):
        """Sole compression (m) under vertical force f (N): a soft set x_s taken up over about F_s, then the bulk
        stiffness (stiffening pad; see RUN_PAD_SET_M_N)."""
        x_s, f_s = c["pad_set"]
        return x_s * (1.0 - np.exp(-f / f_s)) + f / c["stiffness"]

    def stance_pose(self, c, t):
        t = np.asarray(t, float)
        u = (t - c["t0"]) / (c["t1"] - c["t0"])
        th = self.pitch(c, u)
        cos, sin = np.cos(th), np.sin(th)
        rz = self.pts[None, :, 0] * sin[:, None] + self.pts[None, :, 1] * cos[:, None]  # [n, P] sole heights
        k = np.argmin(rz, axis=1)
        rx = self.pts[k, 0] * cos - self.pts[k, 1] * sin
        th0 = self.pitch(c, np.zeros(1))
        k0 = int(np.argmin(self.pts[:, 0] * np.sin(th0) + self.pts[:, 1] * np.cos(th0)))
        x_contact = c["x_contact"] + self.arc[k] - self.arc[k0]  # rolling without slip
        comp = self.compression(c, self.force(c, u))
        return np.stack([x_contact - rx, -rz[np.arange(len(k)), k] - comp, th], axis=-1)

    def sole_x(self, c) -> np.ndarray:
        """x of every sole point over the contact (ground frame), [frames, points]."""
        pose = self.stance_pose(c, np.linspace(c["t0"], c["t1"], 30))
        x, th = pose[:, :1], pose[:, 2:]
        return x + self.pts[None, :, 0] * np.cos(th) - self.pts[None, :, 1] * np.sin(th)

    def _point_heights(self, pose):
        """(x of ankle, height of heel point, height of met-head point) from (x, z, pitch)."""
        x, z, th = pose[..., 0], pose[..., 1], pose[..., 2]
        hz = z + self.heel_pt[0] * np.sin(th) + self.heel_pt[1] * np.cos(th)
        mz = z + self.met_pt[0] * np.sin(th) + self.met_pt[1] * np.cos(th)
        return np.stack([x, hz, mz], axis=-1)

    def _pose_from_heights(self, q):
        x, hz, mz = q[..., 0], q[..., 1], q[..., 2]
        if np.any(np.abs(mz - hz) > 0.98 * self.span):
            raise HamstrideError("the simulated swing pitches the foot beyond 80 deg", code="synth")
        th = np.arcsin(np.clip((mz - hz) / self.span, -1.0, 1.0))
        z = hz - self.heel_pt[0] * np.sin(th) - self.heel_pt[1] * np.cos(th)
        return np.stack([x, z, th], axis=-1)

    def _end_state(self, c, t):
        eps = 1e-4
        q = self._point_heights(self.stance_pose(c, np.array([t - eps, t, t + eps])))
        return q[1], (q[2] - q[0]) / (2 * eps), (q[2] - 2 * q[1] + q[0]) / eps ** 2

    def _swing(self, c0, c1):
        sw = self._swing_keys(c0, c1)
        if c1["level_off"]:
            # a hover only where the forefoot can level off from above: no dip below the hover height before it
            t = np.linspace(sw["t0"], sw["t1"] - c1["hover_s"], 200)
            lvl = sw["keys"][2](np.array([sw["t1"] - c1["hover_s"]]))[0]
            if sw["keys"][2](t).min() < lvl - 0.001:
                c1["level_off"] = False
                sw = self._swing_keys(c0, c1)
        return sw

    def _swing_keys(self, c0, c1):
        """Swing from c0's toe-off to c1's strike: ankle x, heel-point and met-point heights as C2 quintic keys;
        in a level-off landing the met-head point hovers 2-6 mm above its touchdown height over 30-65 ms before
        the strike (the forefoot marker levels off above the floor)."""
        t0, t1 = c0["t1"], c1["t0"]
        q0, v0, a0 = self._end_state(c0, t0 - 1e-4)  # inside the stance (past its end the stance pose is frozen)
        q1, v1, a1 = self._end_state(c1, t1 + 1e-4)
        # vertical accelerations are not carried across the contact ends (the floor's force starts and stops
        # there): the foot falls freely onto the floor and is lifted by the shank after toe-off (RUN_LIFT_ACC_M_S2)
        k = float(np.clip((c0["speed"] - 3.5) / 5.5, 0.0, 1.2))
        lift = RUN_LIFT_ACC_M_S2[0] + k * (RUN_LIFT_ACC_M_S2[1] - RUN_LIFT_ACC_M_S2[0])
        a0 = np.array([a0[0], a0[1] + lift, a0[2] + lift])
        a1 = np.array([a1[0], 0.0, 0.0])
        dur = t1 - t0
        apex = 0.10 + 0.025 * c1["speed"]  # heel lift in swing (m), higher when faster (invented)
        keys = []
        for j in range(3):
            s, val, slope, curv = [t0], [q0[j]], [v0[j]], [a0[j]]
            if j == 1:
                s += [t0 + 0.45 * dur]
                val += [apex]
                slope += [0.0]
                curv += [-16.0 * apex / dur ** 2]
            elif j == 2:  # the foot pitched about 35 deg toe-down at the heel's highest point
                s += [t0 + 0.45 * dur]
                val += [apex - 0.57 * self.span]
                slope += [0.0]
                curv += [-16.0 * (apex - 0.57 * self.span) / dur ** 2]
            if j == 2 and c1["level_off"]:  # the forefoot levels off above the floor, then comes down
                lvl = q1[j] + c1["hover_m"]
                s += [t1 - c1["hover_s"], t1 - 0.012]
                val += [lvl, lvl - 0.0015]
                slope += [-0.01, -0.08]
                curv += [0.0, 0.0]
            s.append(t1)
            val.append(q1[j])
            slope.append(v1[j])
            curv.append(a1[j])
            keys.append(_QuinticKeys(s, val, slope, curv))
        return {"t0": t0, "t1": t1, "keys": keys}

    def pose(self, t):
        t = np.asarray(t, float)
        out = np.full((t.size, 3), np.nan)
        for c in self.contacts:
            m = (t >= c["t0"]) & (t <= c["t1"])
            if m.any():
                out[m] = self.stance_pose(c, t[m])
        for sw in self.swings:
            m = (t > sw["t0"]) & (t < sw["t1"])
            if m.any():
                q = np.stack([k(t[m]) for k in sw["keys"]], axis=-1)
                out[m] = self._pose_from_heights(q)
        return out

    def force_at(self, t):
        t = np.asarray(t, float)
        return sum(self.force(c, (t - c["t0"]) / (c["t1"] - c["t0"])) for c in self.contacts)


def _pitch_law(keys_u, keys_p, end_slope: float):
    """Stance foot pitch over the stance fraction: a C4 quintic spline through the keys (de Boor), starting with
    the slope of the monotone cubic through them (PCHIP, Fritsch & Carlson 1980) and ending at ``end_slope``
    (rad per stance), with no angular acceleration at either end. The swing starts from the stance's end state, so
    the foot's angular velocity at toe-off is its real one rather than the PCHIP end formula's (up to -24 rad/s in
    a sprint); and with a continuous jerk the only jerk spikes in the marker paths are the floor's, where its force
    starts and stops."""
    from scipy.interpolate import PchipInterpolator, make_interp_spline

    start = float(PchipInterpolator(keys_u, keys_p).derivative()(keys_u[0]))
    return make_interp_spline(keys_u, keys_p, k=5, bc_type=([(1, start), (2, 0.0)], [(1, end_slope), (2, 0.0)]))


def _run_contacts(spec: RunSpec, rng) -> tuple[dict[str, list[dict]], str, float]:
    """Contact timeline of both feet (ground frame), alternating, starting before t = 0."""
    strike = spec.strike if spec.strike != "auto" else ("heel" if spec.speed_m_s < 5.0 else "forefoot")
    tc, stride = _run_timing(spec.speed_m_s)
    v = spec.speed_m_s
    reach = 0.22 + 0.015 * v  # foot contact ahead of the pelvis at strike (m, invented)
    out = {s: [] for s in SIDES}
    t = -stride * (1.0 + rng.uniform(0.0, 0.5))
    side = "right"
    while t < spec.duration_s + stride:
        ct = tc * (1.0 + 0.03 * rng.standard_normal())
        # a flat-foot hover before a heel-first landing (in a forefoot landing the forefoot is the first to touch)
        level = bool(rng.uniform() < spec.level_off_share) and strike == "heel"
        if strike == "heel":
            td = (rng.uniform(1.0, 3.0) if level else rng.uniform(8.0, 16.0)) * _DEG
            keys_u, keys_p = [0.0, 0.18, 0.45, 0.75, 1.0], [td, 0.0, -1.0 * _DEG, -20.0 * _DEG, -57.0 * _DEG]
            b_imp, u_imp = 1.0, 0.1
        else:
            td = -(rng.uniform(2.0, 4.0) if level else rng.uniform(7.0, 12.0)) * _DEG
            keys_u, keys_p = [0.0, 0.3, 0.7, 1.0], [td, -2.0 * _DEG, -22.0 * _DEG, -57.0 * _DEG]
            b_imp, u_imp = 0.3, 0.08
        # impulse-momentum: over a step the mean vertical force is body weight (Newton's second law over a
        # periodic step), so a_act follows from the step time and the impact bump's share
        step = 0.5 * stride
        uu = np.linspace(0.0, 1.0, 2001)
        bump = np.trapezoid((uu / u_imp) * np.exp(1.0 - uu / u_imp) * (1.0 - uu), uu)
        a_act = (step / ct - b_imp * bump) * np.pi / 2.0
        out[side].append({
            "t0": t, "t1": t + ct, "strike": strike, "speed": v, "level_off": level,
            "hover_m": rng.uniform(0.002, 0.006), "hover_s": rng.uniform(0.03, 0.065),
            "pitch_fun": _pitch_law(keys_u, keys_p, RUN_TOE_OFF_PITCH_RATE_RAD_S * ct),
            "a_act": a_act, "b_imp": b_imp, "u_imp": u_imp,
            "stiffness": RUN_CONTACT_STIFFNESS_N_M[strike], "pad_set": RUN_PAD_SET_M_N[strike],
            "x_contact": v * t + reach,
        })
        t += step * (1.0 + 0.015 * rng.standard_normal())
        side = "left" if side == "right" else "right"
    return out, strike, stride


def _run_plate_corners(spec: RunSpec, feet: Mapping[str, "_RunFoot"], sway: Mapping[str, float]) -> list:
    """Plate rectangles [4, 3] in the ground frame: overground, two 0.6 x 0.4 m plates in the runway where a right
    and a left contact near the middle of the trial land wholly; treadmill, one plate under each belt half."""
    if spec.plates == "treadmill":
        return [np.array([[x, y0, 0.0] for x, y0 in ((1.0, a), (-1.0, a), (-1.0, b), (1.0, b))])
                for a, b in ((0.0, -0.45), (0.45, 0.0))]  # right half (y < 0), left half
    corners = []
    mid = 0.5 * spec.duration_s
    for side in SIDES:
        cands = [c for c in feet[side].contacts if 0.2 < c["t0"] and c["t1"] < spec.duration_s - 0.2]
        c = min(cands, key=lambda c: abs(c["t0"] - mid))
        xs = feet[side].sole_x(c)
        cx = 0.5 * float(xs.min() + xs.max())
        y = sway[side]
        corners.append(np.array([[cx + 0.3, y + 0.2, 0.0], [cx - 0.3, y + 0.2, 0.0], [cx - 0.3, y - 0.2, 0.0],
                                 [cx + 0.3, y - 0.2, 0.0]]))
    return corners


def simulate_run(spec: RunSpec = RunSpec()) -> tuple[tuple[str, ...], np.ndarray, RunTruth]:
    """Simulate running feet (with pelvis, knee and ankle markers): (labels, xyz [F, M, 3] in the lab frame in m
    with noise, truth with contact times and force plates)."""
    if not 2.5 <= spec.speed_m_s <= 10.5:
        raise ConfigError(f"speed {spec.speed_m_s} m/s is not a running speed the simulator covers (2.5-10.5 m/s)")
    if spec.plates not in ("none", "overground", "treadmill"):
        raise ConfigError("plates must be 'none', 'overground' or 'treadmill'")
    rng = np.random.default_rng(spec.seed)
    body = spec.body
    contacts, strike, stride = _run_contacts(spec, rng)
    n = int(round(spec.duration_s * spec.rate_hz))
    t = np.arange(n) / spec.rate_hz
    v = spec.speed_m_s
    weight = body.mass_kg * GRAVITY
    feet = {s: _RunFoot(body.foot_length_m, contacts[s], weight) for s in SIDES}
    belt = v if spec.treadmill else 0.0
    half_width = 0.5 * body.pelvis_width_m
    sway = {"right": -0.09, "left": 0.09}  # foot lines either side of the midline (m, invented)
    markers: dict[str, np.ndarray] = {}
    lt, ls = body.thigh_length_m, body.shank_length_m
    # pelvis: forward at the running speed, down in each stance, up in flight (about 6-9 cm, invented)
    load = feet["right"].force_at(t) + feet["left"].force_at(t)
    dip = np.convolve(load / weight, np.ones(15) / 15, mode="same")
    hip_z = 0.93 * (lt + ls) + 0.06 - 0.025 * dip
    pel_x = v * t - belt * t
    for side in SIDES:
        foot = feet[side]
        pose = foot.pose(t)
        if np.isnan(pose).any():
            raise HamstrideError("the running timeline does not cover the whole trial", code="synth")
        x, z, th = pose.T
        x = x - belt * t
        y_line = sway[side]
        # soft tissue: markers wobble after each touchdown (20 Hz, 30 ms decay), first downwards: the floor stops
        # the bone and the tissue under the marker carries on in the direction the foot was moving (inertia)
        wobble = np.zeros(n)
        for c in foot.contacts:
            dt = t - c["t0"]
            on = dt >= 0
            wobble[on] -= spec.soft_tissue_mm / 1000.0 * np.exp(-dt[on] / 0.03) * np.sin(2 * np.pi * 20.0 * dt[on])
        local = _foot_markers_local(body.foot_length_m, foot.h_a, side, spec.toe_marker, spec.heel_cluster)
        c_, s_ = np.cos(th), np.sin(th)
        for name, p in local.items():
            mx = x + p[0] * c_ - p[2] * s_
            mz = z + p[0] * s_ + p[2] * c_ + (wobble if name.startswith(("heel", "met", "toe")) else 0.0)
            markers[f"{side[0]}.{name}"] = np.stack([mx, y_line + p[1] + np.zeros(n), mz], axis=-1)
        # knee by two-link inverse kinematics from hip to ankle (knee ahead), epicondyles either side
        hip = np.stack([pel_x, np.full(n, y_line), hip_z], axis=-1)
        ankle = np.stack([x, np.full(n, y_line), z], axis=-1)
        rel = ankle[:, [0, 2]] - hip[:, [0, 2]]
        d = np.clip(np.linalg.norm(rel, axis=1), abs(lt - ls) + 1e-3, lt + ls - 1e-3)
        beta = np.arctan2(rel[:, 0], -rel[:, 1])
        gamma = np.arccos(np.clip((lt * lt + d * d - ls * ls) / (2 * lt * d), -1.0, 1.0))
        phi = beta + gamma
        knee = hip + np.stack([lt * np.sin(phi), np.zeros(n), -lt * np.cos(phi)], axis=-1)
        lat = -_RIGHT_SIGN[side]
        markers[f"{side[0]}.knee.lat"] = knee + np.array([0.0, lat * 0.05, 0.0])
        markers[f"{side[0]}.knee.med"] = knee - np.array([0.0, lat * 0.05, 0.0])
        markers[f"{side[0]}.asis"] = np.stack([pel_x + 0.06, np.full(n, lat * half_width), hip_z + 0.09], axis=-1)
        markers[f"{side[0]}.psis"] = np.stack([pel_x - 0.12, np.full(n, lat * 0.045), hip_z + 0.12], axis=-1)
    labels = tuple(sorted(markers))
    clean = np.stack([markers[k] for k in labels], axis=1)
    noisy = clean + rng.normal(0.0, spec.noise_mm / 1000.0, clean.shape)
    # truth events inside the trial
    fs = {s: np.array([c["t0"] for c in contacts[s] if 0.0 <= c["t0"] <= t[-1]]) for s in SIDES}
    to = {s: np.array([c["t1"] for c in contacts[s] if 0.0 <= c["t1"] <= t[-1]]) for s in SIDES}
    level = {s: np.array([c["level_off"] for c in contacts[s] if 0.0 <= c["t0"] <= t[-1]]) for s in SIDES}
    plates, on_plate = [], {s: [] for s in SIDES}
    if spec.plates != "none":
        n_an = int(round(n * spec.analog_rate_hz / spec.rate_hz))
        ta = np.arange(n_an) / spec.analog_rate_hz
        for k, corners in enumerate(_run_plate_corners(spec, feet, sway)):
            fz = np.zeros(n_an)
            lo, hi = corners[:, 0].min(), corners[:, 0].max()
            ylo, yhi = corners[:, 1].min(), corners[:, 1].max()
            for side in SIDES:
                if not ylo < sway[side] < yhi:
                    continue
                for c in contacts[side]:
                    if spec.treadmill:
                        inside = True
                    else:
                        xs = feet[side].sole_x(c)
                        inside = lo < xs.min() and xs.max() < hi
                    if inside:
                        fz += feet[side].force(c, (ta - c["t0"]) / (c["t1"] - c["t0"]))
                        if 0.0 <= c["t0"] and c["t1"] <= t[-1]:
                            on_plate[side].append((c["t0"], c["t1"]))
            fz = fz + rng.normal(0.0, spec.force_noise_n, n_an)
            plates.append(SimulatedPlate(corners, fz))
    truth = RunTruth(rate_hz=spec.rate_hz, speed_m_s=v, treadmill=spec.treadmill, strike=strike, foot_strikes_s=fs,
                     toe_offs_s=to, level_off=level, plates=tuple(plates),
                     plate_contacts={s: np.array(sorted(on_plate[s])).reshape(-1, 2) for s in SIDES},
                     markers_lab=dict(zip(labels, np.moveaxis(clean, 1, 0))))
    return labels, noisy, truth


def write_run_trial(path: str | Path, spec: RunSpec = RunSpec()) -> RunTruth:
    """Simulate running feet and write them as a C3D file (z up, x forward, mm), with the force plates as a
    FORCE_PLATFORM group and analog channels (type 2: Fx, Fy, Fz, Mx, My, Mz per plate) when ``spec.plates``
    asks for them; returns the truth."""
    from .c3d import write_c3d

    labels, xyz, truth = simulate_run(spec)
    write_c3d(path, labels, xyz * 1000.0, spec.rate_hz, units="mm", subject=_subject(spec.body, spec.athlete),
              force_plates=truth.plates, analog_rate_hz=spec.analog_rate_hz)
    return truth
