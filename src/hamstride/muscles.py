"""Hamstring musculotendon model: length, strain, fibre length, velocity and moment arms, with an uncertainty band.

The model is a pure function of the hip and knee angles and four athlete dimensions: the length of a path depends
only on the relative pose of pelvis, femur and tibia.

Geometry (our own, derived from anatomical proportions and tuned to published moment arms, see
``../shared/references.md``):

* pelvis frame: origin mid-ASIS, X anterior, Y up, Z right (ISB, Wu et al. 2002); hip joint centre from the
  Harrington et al. 2007 PW-only regression (J Biomech 40:595);
* femur pose in the pelvis frame: ``R = Rz(hip_flexion) Rx(hip_adduction) Ry(hip_rotation)`` (Grood & Suntay JCS,
  intrinsic Z-X-Y, right side), femur origin at the hip centre;
* tibia pose in the femur frame: ``Rz(-knee_flexion)`` about the knee centre ``(0, -thigh_length, 0)``;
* each biarticular hamstring runs from the ischial tuberosity (a point fixed in the pelvis) to a point fixed in
  the tibia; the short head runs from the distal linea aspera (fixed in the femur) to the fibular head;
* behind the knee every path wraps, when it touches, over a cylinder about the knee flexion axis (femur Z through
  the knee centre) that stands for the posterior femoral condyles, so the path never cuts through them. The wrapped
  path is the cylinder geodesic: tangent line + helical arc + tangent line, whose length is
  ``sqrt(L_2D**2 + dz**2)`` with ``L_2D`` the length of its projection on the sagittal plane.

Only the right side is modelled; with the contract's sign conventions the left side's anatomical angles give the
same lengths (mirror symmetry), so the same functions serve both legs.

Moment arms come from the tendon-excursion identity ``r_j = -dL/dtheta_j`` (Spoor & van Leeuwen 1992), evaluated
exactly from the gradient of the path length at its end points (``_length_and_moment_arms``). The path function is
also complex-analytic (every branch, wrapping on/off and arctangent quadrant, is chosen from real parts), so
complex-step differentiation (Squire & Trapp 1998, SIAM Rev 40:110) checks those moment arms to rounding.
"""
from __future__ import annotations

import functools
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Sequence

import numpy as np

from .errors import HamstrideError, PlausibilityError

if TYPE_CHECKING:  # pandas only for the practitioner's table (muscle_table); pool workers never load it
    import pandas as pd

MUSCLES = ("biceps_femoris_long", "semitendinosus", "semimembranosus", "biceps_femoris_short")
BIARTICULAR = ("biceps_femoris_long", "semitendinosus", "semimembranosus")
ANGLE_NAMES = ("hip_flexion", "hip_adduction", "hip_rotation", "knee_flexion")
MUSCLE_NAMES = {
    "biceps_femoris_long": "biceps femoris long head",
    "semitendinosus": "semitendinosus",
    "semimembranosus": "semimembranosus",
    "biceps_femoris_short": "biceps femoris short head",
}

#: Specific tension of human muscle, N/m^2: 26.8 N/cm^2 (Persad et al. 2024, J Appl Physiol 137:945 [V]).
SPECIFIC_TENSION_PA = 26.8e4
#: Relative SD of the specific tension for the Monte Carlo band: 15 % (assumption: published human values span
#: about 20-35 N/cm^2, Persad et al. 2024 review [V for the range's existence, M for its width]).
SPECIFIC_TENSION_CV = 0.15
#: Maximum shortening velocity of the fibres, optimal lengths per second: 10 l_opt/s (Zajac 1989, Crit Rev Biomed
#: Eng 17:359; De Groote et al. 2016 normalise velocity by it) [M]; SD for the band 2 l_opt/s (assumption).
MAX_SHORTENING_VELOCITY_LOPT_PER_S = 10.0
MAX_SHORTENING_VELOCITY_SD = 2.0
#: Relative SD of tendon strain at a given force for the band: 20 % (assumption; published tendon strains at
#: maximum isometric force range about 3-6 %, Zajac 1989 3.3 % [M], De Groote et al. 2016 4.9 %).
TENDON_STRAIN_CV = 0.2

# Lower-limb muscle volume from body size: Handsfield et al. 2014 (J Biomech 47:631): total lower-limb muscle
# volume (one limb, 35 muscles) = 47 cm^3/(kg m) x body mass x height + 1285 cm^3 [M numbers, V finding], and each
# muscle keeps a near-constant share of the total (shares below, % of the total, from memory [M]).
LIMB_VOLUME_SLOPE_M3_PER_KG_M = 47.0e-6
LIMB_VOLUME_INTERCEPT_M3 = 1285.0e-6
#: Relative error of a predicted muscle volume (regression scatter plus each muscle's share; assumption, [M]:
#: Handsfield et al. 2014 report individual muscles within roughly +-20 % of the share prediction).
VOLUME_PREDICTION_CV = 0.12
#: Share of the total lower-limb muscle volume, per muscle (Handsfield et al. 2014, Table 2, from memory [M]).
VOLUME_SHARE = {
    "biceps_femoris_long": 0.036,
    "semitendinosus": 0.031,
    "semimembranosus": 0.037,
    "biceps_femoris_short": 0.016,
}
#: The users are sprinters: their hip- and knee-crossing muscles are larger per height x mass than the general
#: population's that Handsfield et al. 2014 describe, by 30 % on average (range 19-54 %), while of the
#: ankle-crossing muscles only tibialis posterior is larger (Handsfield et al. 2017, Scand J Med Sci Sports
#: 27:1072, doi 10.1111/sms.12723, 15 NCAA Division I sprinters [V abstract]). Every hamstring crosses the hip or
#: the knee, so its volume is the 2014 prediction x this ratio by default; the athletes.csv ``strength_factor``
#: then scales the individual (1 = a typical sprinter).
SPRINTER_VOLUME_RATIO = 1.30


class MuscleModelError(HamstrideError):
    """The hamstring model was asked something it cannot answer (unknown muscle, implausible athlete size)."""

    code = "muscle_model"


# --------------------------------------------------------------------------------------------------------------
# Architecture
# --------------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Architecture:
    """Fibre architecture of one muscle (SI units)."""

    optimal_fibre_length_m: float
    optimal_fibre_length_sd_m: float
    pennation_rad: float
    pennation_sd_rad: float
    source: str



_WARD = "Ward et al. 2009, Clin Orthop Relat Res 467:1074: optimal fibre length and pennation (mean, SD) [verified]"
#: Ward et al. 2009 (Clin Orthop Relat Res 467:1074), references.md. cm -> m, deg -> rad. Strength comes from
#: the athlete's muscle volume (``max_isometric_force``), not from these elderly cadavers' PCSAs.
ARCHITECTURE: dict[str, Architecture] = {
    "biceps_femoris_long": Architecture(0.0976, 0.0262, np.deg2rad(11.6), np.deg2rad(5.5), _WARD),
    "semitendinosus": Architecture(0.1930, 0.0412, np.deg2rad(12.9), np.deg2rad(4.9), _WARD),
    "semimembranosus": Architecture(0.0690, 0.0183, np.deg2rad(15.1), np.deg2rad(3.4), _WARD),
    "biceps_femoris_short": Architecture(0.1103, 0.0206, np.deg2rad(12.3), np.deg2rad(3.6), _WARD),
}

#: Tendon slack length assumption. At a given tendon force the fibre length follows the musculotendon length one
#: to one, so l/l_opt is only as good as the tendon slack length. Our default: the fibres are at
#: ``(1 + reference strain) * l_opt`` with the tendon stretched as by F0 (``REFERENCE_TENDON_FORCE``, the loaded
#: late-swing state) in a reference late-swing posture (hip flexion 65 deg, knee flexion 25 deg:
#: typical sprint late-swing angles, references.md [from memory]; Guex et al. 2012: hip > 70 deg at end of swing).
#: Reference strains are Wan et al. 2017 (J Sport Health Sci 6:283) peak sprint fibre strain relative to optimal
#: length, mean and SD: BFlh 0.071 +- 0.059, ST 0.070 +- 0.055, SM 0.064 +- 0.054. No value is published for the
#: short head there: we assume 0 (optimal length at the reference knee angle) with the BFlh SD (assumption).
#: Consequence, shown in every output: 1 cm more slack length lowers l/l_opt by 1 cm / l_opt (0.10 for BFlh).
SLACK_REFERENCE_POSTURE_RAD = (np.deg2rad(65.0), 0.0, 0.0, np.deg2rad(25.0))
REFERENCE_FIBRE_STRAIN: dict[str, tuple[float, float]] = {
    "biceps_femoris_long": (0.071, 0.059),
    "semitendinosus": (0.070, 0.055),
    "semimembranosus": (0.064, 0.054),
    "biceps_femoris_short": (0.0, 0.059),
}
#: One-paragraph statement of the slack-length assumption for exports and reports.
TENDON_SLACK_NOTE = (
    "Fibre length relative to optimal length (l/l_opt) rests on an assumed tendon slack length and is given with "
    "the tendon stretched as by the muscle's maximum isometric force (4.9 %, the loaded late-swing state): "
    "fibres at (1 + Wan et al. 2017 mean peak sprint strain) x l_opt, i.e. 1.071 (BFlh), 1.070 (ST), 1.064 (SM) "
    "and 1.0 (BFsh, assumed), at hip flexion 65 deg / knee flexion 25 deg. Each 1 cm of slack length shifts "
    "l/l_opt by 1 cm / l_opt (BFlh 0.10, ST 0.05, SM 0.14, BFsh 0.09); compare l/l_opt between legs and sessions "
    "of an athlete rather than as an absolute. Strain (vs upright) does not depend on it.")

# --------------------------------------------------------------------------------------------------------------
# Athlete dimensions and path geometry
# --------------------------------------------------------------------------------------------------------------
#: Dimensions of the reference athlete the geometry below was drawn for (1.80 m, proportions of MuscleDims.from_height).
_REF_PW, _REF_PD, _REF_THIGH, _REF_SHANK = 0.261, 0.162, 0.441, 0.443


@dataclass(frozen=True)
class MuscleDims:
    """Athlete dimensions that scale the model (metres).

    pelvis_width_m: inter-ASIS distance (PW); pelvis_depth_m: mid-ASIS to mid-PSIS (PD);
    thigh_length_m: hip centre to knee centre; shank_length_m: knee centre to ankle centre.
    """

    pelvis_width_m: float
    pelvis_depth_m: float
    thigh_length_m: float
    shank_length_m: float

    def __post_init__(self) -> None:
        limits = {"pelvis_width_m": (0.12, 0.45), "pelvis_depth_m": (0.07, 0.30),
                  "thigh_length_m": (0.25, 0.65), "shank_length_m": (0.25, 0.65)}
        for name, (low, high) in limits.items():
            value = float(getattr(self, name))
            if not (low <= value <= high):
                raise PlausibilityError(
                    f"athlete dimension {name} = {value:.4g} m is outside {low}-{high} m; check that it is in metres "
                    "and that the right landmarks were used (ASIS/PSIS for the pelvis, hip/knee/ankle centres)")

    @classmethod
    def from_height(cls, height_m: float) -> "MuscleDims":
        """Dimensions from stature alone. Thigh 0.245 H and shank 0.246 H (Winter 2009 segment lengths, from
        memory); pelvis width 0.145 H and depth 0.09 H (assumed proportions, common practice)."""
        return cls(0.145 * height_m, 0.09 * height_m, 0.245 * height_m, 0.246 * height_m)


@dataclass(frozen=True)
class MusclePath:
    """Attachment geometry of one muscle for one athlete, metres. Arrays broadcast (leading sample axes allowed).

    origin_m: [..., 3] relative to the hip centre in pelvis axes (biarticular) or relative to the knee centre in
    femur axes (short head); insertion_m: [..., 3] relative to the knee centre in tibia axes;
    wrap_radius_m: radius of the condylar cylinder about the knee flexion axis.
    """

    origin_m: np.ndarray
    insertion_m: np.ndarray
    wrap_radius_m: float | np.ndarray
    thigh_length_m: float
    origin_on_femur: bool = False


# Nominal geometry of our own, in dimensionless form (drawn for the reference athlete, mm values in comments):
#  * ischial tuberosity origins relative to the hip centre: x in units of PD, y and z in units of PW. Hamstring
#    origin posterior and slightly inferior/medial to the hip centre (BFlh/ST common tendon on the medial facet,
#    SM on the lateral facet, slightly anterior); tuned so the hip extension moment arm near neutral is 4-5 cm
#    (Nemeth & Ohlsen 1985, 5-7 cm, from memory) and larger than the knee moment arm (Kellis & Blazevich 2022);
#  * tibial points relative to the knee centre in units of shank length: BFlh at the fibular head (lateral),
#    SM on the posteromedial tibial condyle, ST where its tendon turns round the posteromedial tibia toward the pes
#    anserinus (a tibia-fixed via point; the rest of its tendon is tibia-fixed and adds a constant length), tuned to
#    the textbook knee moment arms (ST 40-55, SM 20-40, BF about 20 mm) and Visser et al. 1990 (BF about constant);
#  * condylar cylinder radius in units of thigh length (about 19-22 mm);
#  * short-head origin on the distal lateral linea aspera, relative to the knee centre in units of thigh length.
_ORIGIN_HJC = {  # (x/PD, y/PW, z/PW)
    "biceps_femoris_long": (-46.0 / 162.0, -25.0 / 261.0, -32.0 / 261.0),  # (-46, -25, -32) mm
    "semitendinosus": (-49.0 / 162.0, -25.0 / 261.0, -34.0 / 261.0),  # (-49, -25, -34) mm
    "semimembranosus": (-44.0 / 162.0, -22.0 / 261.0, -28.0 / 261.0),  # (-44, -22, -28) mm
}
_ORIGIN_FEMUR = {"biceps_femoris_short": (-25.0 / 441.0, 150.0 / 441.0, 15.0 / 441.0)}  # (-25, +150, +15) mm
_INSERTION_TIBIA = {  # units of shank length
    "biceps_femoris_long": (-14.0 / 443.0, -24.0 / 443.0, 40.0 / 443.0),  # (-14, -24, +40) mm
    "semitendinosus": (-25.0 / 443.0, -45.0 / 443.0, -30.0 / 443.0),  # (-25, -45, -30) mm
    "semimembranosus": (-20.0 / 443.0, -34.0 / 443.0, -25.0 / 443.0),  # (-20, -34, -25) mm
    "biceps_femoris_short": (-14.0 / 443.0, -24.0 / 443.0, 40.0 / 443.0),  # same fibular-head insertion as BFlh
}
_WRAP_RADIUS = {"biceps_femoris_long": 19.0 / 441.0, "semitendinosus": 22.0 / 441.0, "semimembranosus": 22.0 / 441.0, "biceps_femoris_short": 19.0 / 441.0}

#: Monte Carlo geometry SDs, metres per axis. Attachment points: 2 mm (assumption: "a few mm", 95 % of samples
#: within +-4 mm per axis). Hip centre: Harrington et al. 2007 leave-one-out error 5 / 4 / 3 mm (x / y / z),
#: references.md [verified]; off by default because the regression error of one pelvis moves both hip centres
#: alike (mirror images), so it does not separate the legs - switch it on for absolute values.
ATTACHMENT_SD_M = 0.002
HIP_CENTRE_SD_M = (0.005, 0.004, 0.003)


def _check_muscle(muscle: str) -> None:
    if muscle not in MUSCLES:
        raise MuscleModelError(f"unknown muscle code {muscle!r}; use one of {', '.join(MUSCLES)}")


def hip_centre_in_pelvis(dims: MuscleDims) -> np.ndarray:
    """Hip joint centre in the pelvis frame (m), right side: Harrington et al. 2007 PW-only regression
    (x = -0.24 PD - 9.9 mm, y = -0.30 PW - 10.9 mm, z = 0.33 PW + 7.3 mm)."""
    pw, pd_ = dims.pelvis_width_m, dims.pelvis_depth_m
    return np.array([-0.24 * pd_ - 0.0099, -0.30 * pw - 0.0109, 0.33 * pw + 0.0073])


#: Muscles whose paths are evaluated together: the same kind of origin (pelvis or femur), so one broadcast call.
_PATH_GROUPS = (BIARTICULAR, tuple(m for m in MUSCLES if m not in BIARTICULAR))


def _stacked_path(muscles: tuple[str, ...], dims: MuscleDims | Sequence[MuscleDims]) -> MusclePath:
    """The paths of ``muscles`` (all with pelvis or all with femur origins) stacked on a leading axis: points
    [G, 1, 3], radii [G, 1], so lengths come out [G, frames]; for a list of athlete dimensions (legs) one more
    leading axis: points [L, G, 1, 3], radii [L, G, 1], thigh lengths [L, 1, 1]."""
    if not isinstance(dims, MuscleDims):
        legs = [_stacked_path(muscles, d) for d in dims]
        return MusclePath(np.stack([p.origin_m for p in legs]), np.stack([p.insertion_m for p in legs]),
                          np.stack([p.wrap_radius_m for p in legs]),
                          np.array([p.thigh_length_m for p in legs])[:, None, None], legs[0].origin_on_femur)
    paths = [muscle_path(m, dims) for m in muscles]
    if len({p.origin_on_femur for p in paths}) != 1:
        raise MuscleModelError("muscles stacked in one path evaluation must share the kind of origin")
    return MusclePath(np.stack([p.origin_m for p in paths])[:, None, :],
                      np.stack([p.insertion_m for p in paths])[:, None, :],
                      np.array([[p.wrap_radius_m] for p in paths]), dims.thigh_length_m, paths[0].origin_on_femur)


def muscle_path(muscle: str, dims: MuscleDims) -> MusclePath:
    """The nominal path of ``muscle`` scaled to the athlete (pelvis points by PW/PD, femur by thigh, tibia by shank)."""
    _check_muscle(muscle)
    insertion = np.asarray(_INSERTION_TIBIA[muscle]) * dims.shank_length_m
    radius = _WRAP_RADIUS[muscle] * dims.thigh_length_m
    if muscle in _ORIGIN_FEMUR:
        origin = np.asarray(_ORIGIN_FEMUR[muscle]) * dims.thigh_length_m
        return MusclePath(origin, insertion, radius, dims.thigh_length_m, origin_on_femur=True)
    scale = np.array([dims.pelvis_depth_m, dims.pelvis_width_m, dims.pelvis_width_m])
    return MusclePath(np.asarray(_ORIGIN_HJC[muscle]) * scale, insertion, radius, dims.thigh_length_m)


# --------------------------------------------------------------------------------------------------------------
# Path length (complex-analytic so complex-step derivatives are exact)
# --------------------------------------------------------------------------------------------------------------
def _atan2(y, x):
    """Quadrant-aware arctangent that is complex-analytic: branch chosen from the real parts."""
    if not (np.iscomplexobj(y) or np.iscomplexobj(x)):
        return np.arctan2(y, x)
    yr, xr = np.real(y), np.real(x)
    use_x = np.abs(xr) >= np.abs(yr)
    safe_x = np.where(use_x, x, 1.0)
    safe_y = np.where(use_x, 1.0, y)
    from_x = np.arctan(y / safe_x) + np.where(xr < 0, np.where(yr >= 0, np.pi, -np.pi), 0.0)
    from_y = np.where(yr >= 0, 0.5 * np.pi, -0.5 * np.pi) - np.arctan(x / safe_y)
    return np.where(use_x, from_x, from_y)


def _endpoints(path: MusclePath, hip_flexion, hip_adduction, hip_rotation, knee_flexion, *, tangents: bool = False):
    """Origin and insertion in femur axes relative to the knee centre (m): (ox, oy, oz, ix, iy, iz).

    ``tangents=True`` also returns their angle derivatives: the origin's ``(d/d flexion, d/d adduction,
    d/d rotation)``, each an (x, y, z) triple (None for a femur origin), and the insertion's (x, y) d/d knee flexion.
    """
    o = np.asarray(path.origin_m)
    ox, oy, oz = o[..., 0], o[..., 1], o[..., 2]
    origin_tangents = None
    if not path.origin_on_femur:
        # origin into femur axes: R^T = Ry(-rot) Rx(-add) Rz(-flex), applied right to left
        cf, sf = np.cos(hip_flexion), np.sin(hip_flexion)
        x1, y1 = cf * ox + sf * oy, -sf * ox + cf * oy
        ca, sa = np.cos(hip_adduction), np.sin(hip_adduction)
        y2, z2 = ca * y1 + sa * oz, -sa * y1 + ca * oz
        cr, sr = np.cos(hip_rotation), np.sin(hip_rotation)
        ox, oz = cr * x1 - sr * z2, sr * x1 + cr * z2
        if tangents:  # each elementary rotation's derivative, carried through the rotations after it
            origin_tangents = ((cr * y1 - sr * sa * x1, -ca * x1, sr * y1 + cr * sa * x1),
                               (sr * y2, z2, -cr * y2),
                               (-oz, 0.0, ox))
        oy = y2 + path.thigh_length_m
    i = np.asarray(path.insertion_m)
    c, s = np.cos(knee_flexion), np.sin(knee_flexion)
    ix = c * i[..., 0] + s * i[..., 1]  # Rz(-knee_flexion)
    iy = -s * i[..., 0] + c * i[..., 1]
    if tangents:
        return ox, oy, oz, ix, iy, i[..., 2], origin_tangents, (iy, -ix)
    return ox, oy, oz, ix, iy, i[..., 2]


def _wrap(radius, ox, oy, ix, iy):
    """Sagittal wrap over the condylar cylinder (centre at the knee centre), seen with X anterior to the right and
    Y up: the path leaves the origin's tangent point T1 and runs counter-clockwise over the posterior condyles to
    the insertion's tangent point T2. Returns (arc angle T1->T2, origin tangent length, insertion tangent length,
    (T1x, T1y), (T2x, T2y)); the path touches the cylinder when the arc is positive."""
    r2 = radius * radius
    ro2 = ox * ox + oy * oy
    ri2 = ix * ix + iy * iy
    ho = np.sqrt(ro2 - r2)
    hi = np.sqrt(ri2 - r2)
    t1x, t1y = (r2 * ox - radius * ho * oy) / ro2, (r2 * oy + radius * ho * ox) / ro2
    t2x, t2y = (r2 * ix + radius * hi * iy) / ri2, (r2 * iy - radius * hi * ix) / ri2
    return _atan2(t1x * t2y - t1y * t2x, t1x * t2x + t1y * t2y), ho, hi, (t1x, t1y), (t2x, t2y)


def _path_length(path: MusclePath, hip_flexion, hip_adduction, hip_rotation, knee_flexion):
    """Length of the wrapped path (m). All angle inputs broadcast against each other and the path arrays."""
    ox, oy, oz, ix, iy, iz = _endpoints(path, hip_flexion, hip_adduction, hip_rotation, knee_flexion)
    dz2 = (oz - iz) ** 2
    straight = np.sqrt((ox - ix) ** 2 + (oy - iy) ** 2 + dz2)
    radius = path.wrap_radius_m
    arc, ho, hi, _, _ = _wrap(radius, ox, oy, ix, iy)
    wrapped = np.sqrt((ho + radius * arc + hi) ** 2 + dz2)  # cylinder geodesic: constant pitch along the path
    return np.where(np.real(arc) > 0.0, wrapped, straight)


def _length_and_moment_arms(path: MusclePath, hip_flexion, hip_adduction, hip_rotation, knee_flexion):
    """Length (m) and moment arms ``r_j = -dL/dtheta_j`` ([..., 4], ``ANGLE_NAMES`` order) in one real evaluation.

    dL/dtheta = (gradient of L at the origin) . d(origin)/dtheta + (gradient at the insertion) . d(insertion)/dtheta.
    The gradient of a shortest path's length with respect to an end point is the unit vector along the path's
    last straight piece, pointing out of the path (first variation of arc length; for the wrapped path the contact
    points slide but the arc adds no first-order term). For the helical wrap ``L = sqrt(s**2 + dz**2)`` that
    gives ``(s / L) (O - T1) / |O - T1|`` in the sagittal plane and ``dz / L`` along the cylinder axis.
    The same numbers as complex-step differentiation of ``_path_length`` to rounding (tested).
    """
    ox, oy, oz, ix, iy, iz, origin_tangents, insertion_tangent = _endpoints(
        path, hip_flexion, hip_adduction, hip_rotation, knee_flexion, tangents=True)
    dx, dy, dz = ox - ix, oy - iy, oz - iz
    straight = np.sqrt(dx * dx + dy * dy + dz * dz)
    radius = path.wrap_radius_m
    arc, ho, hi, (t1x, t1y), (t2x, t2y) = _wrap(radius, ox, oy, ix, iy)
    in_plane = ho + radius * arc + hi
    wrapped = np.sqrt(in_plane * in_plane + dz * dz)
    wraps = arc > 0.0
    length = np.where(wraps, wrapped, straight)
    pitch = in_plane / wrapped
    # gradients of the length with respect to the origin (g_o) and the insertion (g_i), sagittal x, y and axial z
    g_oz = dz / length
    g_ox = np.where(wraps, pitch * (ox - t1x) / ho, dx / straight)
    g_oy = np.where(wraps, pitch * (oy - t1y) / ho, dy / straight)
    g_ix = np.where(wraps, pitch * (ix - t2x) / hi, -dx / straight)
    g_iy = np.where(wraps, pitch * (iy - t2y) / hi, -dy / straight)
    zero = np.zeros(np.shape(length))
    if origin_tangents is None:
        hip_arms = [zero, zero, zero]  # a path from femur to tibia does not depend on the hip angles
    else:
        hip_arms = [0.0 - (g_ox * tx + g_oy * ty + g_oz * tz) for tx, ty, tz in origin_tangents]
    knee_arm = 0.0 - (g_ix * insertion_tangent[0] + g_iy * insertion_tangent[1])
    return length, np.stack(np.broadcast_arrays(*hip_arms, knee_arm), axis=-1)


def wrap_arc_rad(muscle, hip_flexion, hip_adduction, hip_rotation, knee_flexion, dims, geometry=None) -> np.ndarray:
    """Arc (rad) the path covers on the condylar cylinder; <= 0 means the straight path clears it."""
    path = geometry if geometry is not None else muscle_path(muscle, dims)
    ox, oy, _, ix, iy, _ = _endpoints(path, hip_flexion, hip_adduction, hip_rotation, knee_flexion)
    return _wrap(path.wrap_radius_m, ox, oy, ix, iy)[0]


def musculotendon_length(muscle: str, hip_flexion, hip_adduction, hip_rotation, knee_flexion, dims: MuscleDims,
                         geometry: MusclePath | None = None) -> np.ndarray:
    """Musculotendon length (m) of ``muscle`` at the given joint angles (rad, right-side JCS; broadcasting).

    ``geometry`` overrides the nominal path (e.g. Monte Carlo samples with a leading sample axis).
    """
    path = geometry if geometry is not None else muscle_path(muscle, dims)
    return _path_length(path, hip_flexion, hip_adduction, hip_rotation, knee_flexion)


def moment_arms(muscle: str, hip_flexion, hip_adduction, hip_rotation, knee_flexion, dims: MuscleDims,
                geometry: MusclePath | None = None) -> np.ndarray:
    """Moment arms r_j = -dL/dtheta_j (m per rad), shape [..., 4] in the order of ``ANGLE_NAMES``.

    Exact (analytic gradient of the path length, ``_length_and_moment_arms``; equal to complex-step
    differentiation, Squire & Trapp 1998, to rounding). Hamstrings give r < 0 at hip flexion (hip extensors) and
    r > 0 at knee flexion (knee flexors); the short head has zero hip moment arms.
    """
    path = geometry if geometry is not None else muscle_path(muscle, dims)
    angles = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in
                                   (hip_flexion, hip_adduction, hip_rotation, knee_flexion)))
    return _length_and_moment_arms(path, *angles)[1]


# --------------------------------------------------------------------------------------------------------------
# Fibre length and force curves
# --------------------------------------------------------------------------------------------------------------
#: Tendon force (F0 units) at which the muscles stage's fibre lengths are given: 1, the tendon stretched as by the
#: maximum isometric force (about 4.9 % strain, ``tendon_strain``). Late swing is when the hamstrings pull hardest,
#: so the kinematic l/l_opt describes the loaded late-swing fibres; the dynamics stage recomputes the fibre length
#: with each frame's own force (compliant tendon), and ``muscle_table`` also gives the resting (unloaded) value.
REFERENCE_TENDON_FORCE = 1.0


def fibre_length(mtu_length_m, tendon_slack_length_m, optimal_fibre_length_m, pennation_at_optimal_rad,
                 tendon_force_norm=REFERENCE_TENDON_FORCE, tendon_strain_scale=1.0):
    """Fibre length (m) and pennation (rad) of a unit whose tendon carries ``tendon_force_norm`` (F0 units; default
    the reference force 1), with constant muscle thickness (``l sin(alpha) = l_opt sin(alpha_opt)``; the planimetric
    model of Hill-type muscle models, Zajac 1989 [M]): ``l = sqrt((L - L_T)^2 + (l_opt sin alpha_opt)^2)`` with the
    tendon length ``L_T = L_ts (1 + strain(F))`` (De Groote et al. 2016 tendon curve; ``tendon_strain_scale``
    scales the strain, for the Monte Carlo band).

    A unit shorter than its tendon has fibres at their shortest (``L - L_T`` taken as 0: l = thickness, pennation
    90 deg), so fibre length never falls as the unit lengthens."""
    thickness = optimal_fibre_length_m * np.sin(pennation_at_optimal_rad)
    tendon = tendon_slack_length_m * (1.0 + tendon_strain(tendon_force_norm) * tendon_strain_scale)
    along = np.clip(np.asarray(mtu_length_m) - tendon, 0.0, None)
    length = np.sqrt(along * along + thickness * thickness)
    return length, np.arctan2(thickness, along)


def tendon_slack_length(muscle: str, dims: MuscleDims, *, geometry: MusclePath | None = None,
                        optimal_fibre_length_m=None, pennation_rad=None, reference_strain=None):
    """Tendon slack length (m) by our stated assumption (see ``SLACK_REFERENCE_POSTURE_RAD``): fibres at
    ``(1 + reference strain) l_opt`` in the reference late-swing posture (Wan et al. 2017 mean peak strains)."""
    arch = ARCHITECTURE[muscle]
    l_opt = arch.optimal_fibre_length_m if optimal_fibre_length_m is None else optimal_fibre_length_m
    alpha = arch.pennation_rad if pennation_rad is None else pennation_rad
    strain = REFERENCE_FIBRE_STRAIN[muscle][0] if reference_strain is None else reference_strain
    reference_length = musculotendon_length(muscle, *SLACK_REFERENCE_POSTURE_RAD, dims, geometry)
    return _slack_rule(reference_length, l_opt, alpha, strain)


def _reference_and_upright_lengths(path: MusclePath) -> tuple[np.ndarray, np.ndarray]:
    """Lengths in the slack rule's reference posture and upright, in one evaluation: [..., 1] each for a path whose
    points have a length-1 frame axis."""
    both = _path_length(path, *(np.array([angle, 0.0]) for angle in SLACK_REFERENCE_POSTURE_RAD))
    return both[..., :1], both[..., 1:]


def _slack_rule(reference_length_m, optimal_fibre_length_m, pennation_rad, reference_strain):
    """The slack length that puts the fibres at ``(1 + reference strain) l_opt`` when the unit has its reference
    length and the tendon carries the reference force (``REFERENCE_TENDON_FORCE``: stretched by its strain at F0,
    4.9 %), constant thickness ``l_opt sin(alpha_opt)``; broadcasts over legs, muscles, samples."""
    fibre = (1.0 + reference_strain) * optimal_fibre_length_m
    thickness = optimal_fibre_length_m * np.sin(pennation_rad)
    loaded_tendon = reference_length_m - np.sqrt(fibre * fibre - thickness * thickness)
    return loaded_tendon / (1.0 + tendon_strain(REFERENCE_TENDON_FORCE))


# Force curves of De Groote et al. 2016 (Ann Biomed Eng 44:2922, supplementary material): smooth, explicit Hill-type
# curves. Constants as published [V: the same values are documented as the published ones by the independent sympy
# implementation, sympy.physics.biomechanics, which the tests compare against at named points].
#: Active force-length: sum of three Gaussian-like terms b1 exp(-(l - b2)^2 / (2 (b3 + b4 l)^2)).
ACTIVE_FORCE_LENGTH_TERMS = ((0.814, 1.06, 0.162, 0.0633), (0.433, 0.717, -0.0299, 0.2), (0.1, 1.0, 0.354, 0.0))
#: Passive force-length: (exp(k (l - 1) / e0) - 1) / (exp(k) - 1), k = 4, e0 = 0.6 (De Groote et al. 2016, after
#: Thelen 2003, J Biomech Eng 125:70): 1 F0 at 1.6 l_opt; taken as 0 below l_opt.
PASSIVE_SHAPE = 4.0
PASSIVE_STRAIN_AT_F0 = 0.6
#: Force-velocity: d1 log(d2 v + d3 + sqrt((d2 v + d3)^2 + 1)) + d4, v = fibre velocity / v_max (lengthening
#: positive). Lengthening force rises to about 1.8 F0 (1.79 at v_max), isometric 1.00, zero near v_max shortening.
FORCE_VELOCITY_CONSTANTS = (-0.318, -8.149, -0.374, 0.886)
#: Tendon force-length: f = c0 exp(c3 (l_T / l_slack - c1)) - c2 (tendon strain about 4.9 % at F0).
TENDON_CONSTANTS = (0.2, 0.995, 0.25, 33.93669377311689)


def active_force_length(l_norm) -> np.ndarray:
    """Active force-length multiplier of De Groote et al. 2016 (three Gaussian-like terms; 0.994 at l_opt)."""
    x = np.asarray(l_norm, dtype=float)
    out = np.zeros(np.shape(x))
    for b1, b2, b3, b4 in ACTIVE_FORCE_LENGTH_TERMS:
        out = out + b1 * np.exp(-0.5 * (x - b2) ** 2 / (b3 + b4 * x) ** 2)
    return out


def passive_force_length(l_norm) -> np.ndarray:
    """Passive force-length multiplier ``(exp(k (l - 1) / e0) - 1) / (exp(k) - 1)``, k = 4, e0 = 0.6 (De Groote et
    al. 2016; Thelen 2003): 1 F0 at 1.6 l_opt, 0 at and below l_opt (the published curve dips to -0.02 there)."""
    stretch = np.clip(np.asarray(l_norm, dtype=float) - 1.0, 0.0, None)
    return np.expm1(PASSIVE_SHAPE * stretch / PASSIVE_STRAIN_AT_F0) / np.expm1(PASSIVE_SHAPE)


def force_velocity(v_norm_lopt_per_s, max_velocity_lopt_per_s=MAX_SHORTENING_VELOCITY_LOPT_PER_S) -> np.ndarray:
    """Force-velocity multiplier of De Groote et al. 2016, fibre velocity in l_opt/s, lengthening positive.

    ``d1 log(d2 w + d3 + sqrt((d2 w + d3)^2 + 1)) + d4`` with w = v / v_max (v_max 10 l_opt/s, Zajac 1989):
    1.00 isometric, rising on the lengthening (eccentric) side to 1.79 at w = 1, falling to 0.01 at w = -1;
    clipped at 0 beyond maximum shortening velocity. ``max_velocity_lopt_per_s`` broadcasts (Monte Carlo draws).
    """
    d1, d2, d3, d4 = FORCE_VELOCITY_CONSTANTS
    w = np.asarray(v_norm_lopt_per_s, dtype=float) / max_velocity_lopt_per_s
    u = d2 * w + d3
    return np.clip(d1 * np.log(u + np.sqrt(u * u + 1.0)) + d4, 0.0, None)


def tendon_force_length(tendon_length_norm) -> np.ndarray:
    """Tendon force (F0 units) at a tendon length in slack lengths: ``c0 exp(c3 (l - c1)) - c2`` (De Groote et al.
    2016), 0 when slack."""
    c0, c1, c2, c3 = TENDON_CONSTANTS
    return np.clip(c0 * np.exp(c3 * (np.asarray(tendon_length_norm, dtype=float) - c1)) - c2, 0.0, None)


def tendon_strain(force_norm) -> np.ndarray:
    """Tendon strain at a force in F0 units: the inverse of ``tendon_force_length`` (0 for no force: the slack
    length is where force starts)."""
    c0, c1, c2, c3 = TENDON_CONSTANTS
    f = np.clip(np.asarray(force_norm, dtype=float), 0.0, None)
    # the published curve reaches zero force at 0.16 % strain; a tendon without force is at its slack length (0)
    return np.where(f > 0.0, np.clip(c1 + np.log((f + c2) / c0) / c3 - 1.0, 0.0, None), 0.0)


# --------------------------------------------------------------------------------------------------------------
# Per-frame states
# --------------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class MuscleState:
    """One muscle over the frames of a trial (SI units).

    strain: (L - L_upright) / L_upright; fibre_length_lopt: fibre length / optimal fibre length with the tendon at
    its F0 stretch (depends on the tendon slack length assumption, see ``tendon_slack_length``); velocity_m_per_s:
    musculotendon lengthening velocity; velocity_lopt_per_s: fibre lengthening velocity (v cos(alpha), the tendon's
    stretch rate left out) in l_opt/s, the input of ``force_velocity``; moment_arms_m: [F, 4] in ``ANGLE_NAMES``
    order; pennation_rad: [F]; tendon_slack_length_m: the tendon's length without force.
    """

    muscle: str
    length_m: np.ndarray
    strain: np.ndarray
    fibre_length_lopt: np.ndarray
    velocity_m_per_s: np.ndarray
    velocity_lopt_per_s: np.ndarray
    moment_arms_m: np.ndarray
    max_isometric_force_n: float
    tendon_slack_length_m: float
    upright_length_m: float
    optimal_fibre_length_m: float = 0.0
    pennation_rad: np.ndarray = field(default_factory=lambda: np.zeros(0))


def _angle_arrays(angles: dict) -> list[np.ndarray]:
    missing = [name for name in ANGLE_NAMES if name not in angles]
    if missing:
        raise MuscleModelError(f"joint angles missing for the muscle model: {', '.join(missing)}")
    arrays = np.broadcast_arrays(*(np.asarray(angles[name], dtype=float) for name in ANGLE_NAMES))
    if arrays[0].ndim != 1:
        raise MuscleModelError("joint angles must be 1-D arrays over frames (radians)")
    return arrays


def limb_muscle_volume_m3(body_mass_kg: float, height_m: float) -> float:
    """Total muscle volume of one lower limb (m^3) from body mass x height (Handsfield et al. 2014 regression)."""
    if body_mass_kg is None or not np.isfinite(body_mass_kg) or body_mass_kg <= 0:
        raise MuscleModelError("muscle strength needs the athlete's body mass; add body_mass_kg to athletes.csv")
    if height_m is None or not np.isfinite(height_m) or not 1.0 <= height_m <= 2.5:
        raise MuscleModelError(f"height {height_m!r} m is not a plausible stature; give height_m in metres")
    return LIMB_VOLUME_SLOPE_M3_PER_KG_M * body_mass_kg * height_m + LIMB_VOLUME_INTERCEPT_M3


def max_isometric_force(muscle: str, *, body_mass_kg: float, height_m: float, strength_factor: float = 1.0,
                        volume_share: float | None = None, optimal_fibre_length_m=None, pennation_rad=None,
                        specific_tension_pa=SPECIFIC_TENSION_PA, sprinter_volume_ratio=SPRINTER_VOLUME_RATIO):
    """Maximum isometric force (N) of one muscle of this athlete.

    volume = share x limb volume (Handsfield et al. 2014: body mass x height regression) x the sprinters' ratio
    for hip- and knee-crossing muscles (``SPRINTER_VOLUME_RATIO``, Handsfield et al. 2017); PCSA = volume / l_opt
    (Ward et al. 2009 optimal fibre length); F0 = PCSA x specific tension (26.8 N/cm^2, Persad et al. 2024) x
    cos(pennation) x ``strength_factor`` (an athlete's own factor, default 1). Architecture arguments broadcast
    (Monte Carlo draws).
    """
    _check_muscle(muscle)
    if not np.isfinite(strength_factor) or strength_factor <= 0:
        raise MuscleModelError(f"strength factor {strength_factor!r} must be a positive number (1 = typical)")
    arch = ARCHITECTURE[muscle]
    share = VOLUME_SHARE[muscle] if volume_share is None else volume_share
    l_opt = arch.optimal_fibre_length_m if optimal_fibre_length_m is None else optimal_fibre_length_m
    alpha = arch.pennation_rad if pennation_rad is None else pennation_rad
    volume = share * limb_muscle_volume_m3(body_mass_kg, height_m) * sprinter_volume_ratio
    return volume / l_opt * specific_tension_pa * np.cos(alpha) * strength_factor


def stature_from_dims(dims: MuscleDims) -> float:
    """Stature (m) estimated from thigh + shank length (the proportions of ``MuscleDims.from_height``), for
    athletes without a height in athletes.csv."""
    return (dims.thigh_length_m + dims.shank_length_m) / (0.245 + 0.246)


def athlete_max_forces(body_mass_kg: float | None, height_m: float, strength_factor: float = 1.0,
                       muscles: Sequence[str] = MUSCLES) -> dict[str, float]:
    """``max_isometric_force`` of every muscle (NaN without a body mass: forces need it)."""
    if body_mass_kg is None or not np.isfinite(body_mass_kg) or body_mass_kg <= 0:
        return {m: float("nan") for m in muscles}
    return {m: float(max_isometric_force(m, body_mass_kg=body_mass_kg, height_m=height_m,
                                         strength_factor=strength_factor)) for m in muscles}


def muscle_states(angles: dict[str, np.ndarray], rate_hz: float, dims: MuscleDims, *,
                  body_mass_kg: float | None = None, height_m: float | None = None, strength_factor: float = 1.0,
                  tendon_slack_lengths_m: dict[str, float] | None = None) -> dict[str, MuscleState]:
    """Length, strain, fibre length, velocities and moment arms of every hamstring over the frames.

    ``angles``: hip_flexion, hip_adduction, hip_rotation, knee_flexion in rad [F] (either side: mirror symmetry).
    Velocity from the excursion identity ``v = -sum_j r_j dtheta_j/dt`` with dtheta/dt from ``np.gradient``.
    ``tendon_slack_lengths_m`` overrides the default slack-length assumption per muscle.
    """
    return muscle_states_of_legs([(angles, dims)], rate_hz, body_mass_kg=body_mass_kg, height_m=height_m,
                                 strength_factor=strength_factor,
                                 tendon_slack_lengths_m=tendon_slack_lengths_m)[0]


def muscle_states_of_legs(legs, rate_hz: float, *, body_mass_kg: float | None = None,
                          height_m: float | None = None, strength_factor: float = 1.0,
                          tendon_slack_lengths_m: dict[str, float] | None = None) -> list[dict[str, MuscleState]]:
    """``muscle_states`` for several legs of one trial, each (angles, dims), evaluated together: every leg and
    muscle of a kind of path in one broadcast call ([leg, muscle, frame]), the same numbers as leg by leg."""
    if not rate_hz or rate_hz <= 0:
        raise MuscleModelError(f"frame rate must be positive, got {rate_hz}")
    per_leg = [_angle_arrays(angles) for angles, _ in legs]
    if len({leg[0].size for leg in per_leg}) > 1:
        raise MuscleModelError("legs evaluated together must have the same number of frames")
    all_dims = [dims for _, dims in legs]
    arrays = [np.stack([leg[j] for leg in per_leg])[:, None, :] for j in range(4)]  # [L, 1, F]
    n_frames = per_leg[0][0].size
    rates = np.stack([np.gradient(a, 1.0 / rate_hz, axis=-1) if n_frames > 1 else np.zeros_like(a)
                      for a in arrays], axis=-1)  # [L, 1, F, 4]
    forces = athlete_max_forces(body_mass_kg, height_m if height_m else stature_from_dims(all_dims[0]),
                                strength_factor)
    states: list[dict[str, MuscleState]] = [{} for _ in legs]
    for group in _PATH_GROUPS:  # muscles of one kind of path in one vectorised evaluation
        path = _stacked_path(group, all_dims)
        length, arms = _length_and_moment_arms(path, *arrays)  # [L, G, F], [L, G, F, 4]
        reference, upright = _reference_and_upright_lengths(path)  # [L, G, 1] each
        arch = [ARCHITECTURE[m] for m in group]
        l_opt = np.array([a.optimal_fibre_length_m for a in arch])[:, None]  # [G, 1]
        alpha = np.array([a.pennation_rad for a in arch])[:, None]
        slack = _slack_rule(reference, l_opt, alpha, np.array([REFERENCE_FIBRE_STRAIN[m][0] for m in group])[:, None])
        for k, muscle in enumerate(group):
            if tendon_slack_lengths_m and muscle in tendon_slack_lengths_m:
                slack[:, k] = float(tendon_slack_lengths_m[muscle])
        fibre, pennation = fibre_length(length, slack, l_opt, alpha)
        velocity = -np.sum(arms * rates, axis=-1)
        fibre_velocity = velocity * np.cos(pennation)
        fibre_lopt = fibre / l_opt
        velocity_lopt = fibre_velocity / l_opt
        strain = length / upright - 1.0
        for leg in range(len(legs)):
            for k, muscle in enumerate(group):
                states[leg][muscle] = MuscleState(
                    muscle=muscle, length_m=length[leg, k], strain=strain[leg, k],
                    fibre_length_lopt=fibre_lopt[leg, k], velocity_m_per_s=velocity[leg, k],
                    velocity_lopt_per_s=velocity_lopt[leg, k], moment_arms_m=arms[leg, k],
                    max_isometric_force_n=forces[muscle], tendon_slack_length_m=float(slack[leg, k, 0]),
                    upright_length_m=float(upright[leg, k, 0]), optimal_fibre_length_m=arch[k].optimal_fibre_length_m,
                    pennation_rad=pennation[leg, k])
    return [{m: leg_states[m] for m in MUSCLES} for leg_states in states]


# --------------------------------------------------------------------------------------------------------------
# Monte Carlo uncertainty band
# --------------------------------------------------------------------------------------------------------------
def sample_paths(muscle: str, dims: MuscleDims, n_samples: int, rng: np.random.Generator, *,
                 include_hip_centre_error: bool = False) -> MusclePath:
    """``n_samples`` perturbed paths with a leading sample axis ([S, 1, 3] points): attachment points with SD
    ``ATTACHMENT_SD_M`` per axis and, optionally for pelvis origins, the hip-centre error of Harrington et al. 2007."""
    return _perturbed_path(muscle, dims, rng.standard_normal((n_samples, 1, 3)), rng.standard_normal((n_samples, 1, 3)),
                           include_hip_centre_error)


def _perturbed_path(muscle: str, dims: MuscleDims, origin_z: np.ndarray, insertion_z: np.ndarray,
                    include_hip_centre_error: bool) -> MusclePath:
    nominal = muscle_path(muscle, dims)
    origin_sd = np.full(3, ATTACHMENT_SD_M)
    if include_hip_centre_error and not nominal.origin_on_femur:  # origin is relative to the hip centre
        origin_sd = np.hypot(origin_sd, HIP_CENTRE_SD_M)
    origin = nominal.origin_m + origin_z * origin_sd
    insertion = nominal.insertion_m + insertion_z * ATTACHMENT_SD_M
    return MusclePath(origin, insertion, nominal.wrap_radius_m, nominal.thigh_length_m, nominal.origin_on_femur)


@functools.lru_cache(maxsize=8)
def _standard_draws(n_samples: int, seed: int) -> dict[str, tuple[np.ndarray, ...]]:
    """The generator's standard normal draws of every muscle, in the band's fixed order: origin [S, 1, 3],
    insertion [S, 1, 3], then l_opt, pennation and reference strain [S, 1]. The same for every leg and trial with
    this seed (that is what pairs the legs), so they are drawn once per process; read-only."""
    rng = np.random.default_rng(seed)
    shapes = ((n_samples, 1, 3), (n_samples, 1, 3), (n_samples, 1), (n_samples, 1), (n_samples, 1))
    draws = {}
    for muscle in MUSCLES:
        draws[muscle] = tuple(rng.standard_normal(shape) for shape in shapes)
        for z in draws[muscle]:
            z.flags.writeable = False
    return draws


def _truncated_normal(mean, sd, low, high, z):
    """``mean + sd z`` clipped to [low, high] (numpy's ``normal(mean, sd)`` is ``mean + sd * standard normal``)."""
    return np.clip(mean + sd * z, low, high)


@dataclass(frozen=True)
class _SampledMuscle:
    """One muscle's Monte Carlo draws: paths [S, 1, 3] and per-sample l_opt, pennation, slack, upright length [S, 1]."""

    paths: MusclePath
    optimal_fibre_length_m: np.ndarray
    pennation_rad: np.ndarray
    slack_length_m: np.ndarray
    upright_length_m: np.ndarray

    def strain_and_lopt(self, length_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        fibre, _ = fibre_length(length_m, self.slack_length_m, self.optimal_fibre_length_m, self.pennation_rad)
        return length_m / self.upright_length_m - 1.0, fibre / self.optimal_fibre_length_m


def _draw_samples(dims: MuscleDims, n_samples: int, seed: int, include_hip_centre_error: bool):
    """The draws of every muscle, in a fixed order from one generator (so a seed fixes the whole band); the slack
    rule's two postures of all muscles with the same kind of origin in one path evaluation."""
    if n_samples < 1:
        raise MuscleModelError("the Monte Carlo band needs at least one sample")
    draws = _standard_draws(int(n_samples), seed)
    for group in _PATH_GROUPS:
        drawn = []
        for muscle in group:
            arch = ARCHITECTURE[muscle]
            origin_z, insertion_z, lopt_z, alpha_z, ref_z = draws[muscle]
            paths = _perturbed_path(muscle, dims, origin_z, insertion_z, include_hip_centre_error)
            l_opt = _truncated_normal(arch.optimal_fibre_length_m, arch.optimal_fibre_length_sd_m,
                                      0.5 * arch.optimal_fibre_length_m, 1.5 * arch.optimal_fibre_length_m, lopt_z)
            alpha = _truncated_normal(arch.pennation_rad, arch.pennation_sd_rad, 0.0, np.deg2rad(30.0), alpha_z)
            ref_mean, ref_sd = REFERENCE_FIBRE_STRAIN[muscle]
            drawn.append((muscle, paths, l_opt, alpha, _truncated_normal(ref_mean, ref_sd, -0.3, 0.4, ref_z)))
        group_paths = MusclePath(np.concatenate([d[1].origin_m for d in drawn], axis=1)[:, :, None],
                                 np.concatenate([d[1].insertion_m for d in drawn], axis=1)[:, :, None],
                                 np.array([[d[1].wrap_radius_m] for d in drawn]), dims.thigh_length_m,
                                 drawn[0][1].origin_on_femur)
        reference, upright = _reference_and_upright_lengths(group_paths)  # [S, G, 1] each
        for k, (muscle, paths, l_opt, alpha, ref_strain) in enumerate(drawn):
            slack = _slack_rule(reference[:, k], l_opt, alpha, ref_strain)
            yield muscle, _SampledMuscle(paths, l_opt, alpha, slack, upright[:, k])


def monte_carlo_lengths(angles: dict[str, np.ndarray], dims: MuscleDims, n_samples: int = 200,
                        seed: int = 0, *, include_hip_centre_error: bool = False
                        ) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Monte Carlo strain and l/l_opt, each [S, F], per muscle (vectorised over samples and frames).

    Varied: attachment points (``sample_paths``), optimal fibre length and pennation (Ward et al. 2009 SDs,
    clipped to 0.5-1.5 x mean and 0-30 deg), and the reference fibre strain of the slack-length assumption
    (Wan et al. 2017 SDs). The tendon slack length is re-derived for each sample by the same rule.
    The same ``seed`` gives the same draws for both legs, so samples are paired (see ``peak_difference_band``).
    """
    arrays = _angle_arrays(angles)
    return {muscle: sampled.strain_and_lopt(_path_length(sampled.paths, *arrays))
            for muscle, sampled in _draw_samples(dims, n_samples, seed, include_hip_centre_error)}


#: Frames whose nominal length is within this of the window's nominal peak are searched for each sample's peak.
#: Attachment and architecture draws move a sample's peak by at most 0.4 mm of nominal length on the demo and
#: benchmark sprints (measured over 200 samples, every stride); the margin is 2.5 times that, and
#: ``monte_carlo_peaks`` still searches the whole window whenever a sample's peak lands on the searched frames' edge.
PEAK_SEARCH_MARGIN_M = 0.001


def monte_carlo_peaks(angles: dict[str, np.ndarray], windows, dims: MuscleDims, n_samples: int = 200,
                      seed: int = 0, *, nominal_lengths_m: dict[str, np.ndarray] | None = None,
                      include_hip_centre_error: bool = False, margin_m: float = PEAK_SEARCH_MARGIN_M
                      ) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Each sample's peak strain and peak l/l_opt in each frame window ``[start, stop)``, each [S, W] per muscle.

    The same draws and numbers as the peaks of ``monte_carlo_lengths`` over each window, at a fraction of the
    cost: strain and l/l_opt never fall as the musculotendon length rises (``fibre_length``), so a sample peaks where
    its length peaks, and that is next to the nominal peak. Samples are evaluated only on frames whose nominal length
    is within ``margin_m`` of the window's nominal maximum; a window is searched in full when a sample's maximum sits
    on an inner edge of those frames.
    ``nominal_lengths_m`` (per muscle, [F]) saves recomputing the nominal lengths (e.g. from ``muscle_states``).
    """
    arrays = _angle_arrays(angles)
    n_frames = arrays[0].size
    windows = [(max(int(a), 0), min(int(b), n_frames)) for a, b in windows]
    out = {}
    for muscle, sampled in _draw_samples(dims, n_samples, seed, include_hip_centre_error):
        if nominal_lengths_m is not None and muscle in nominal_lengths_m:
            nominal = np.asarray(nominal_lengths_m[muscle], dtype=float)
        else:
            nominal = _path_length(muscle_path(muscle, dims), *arrays)
        searched = [_peak_search_frames(nominal, a, b, margin_m) for a, b in windows]
        strain, lopt, suspect = _window_peaks(sampled, arrays, nominal, windows, searched)
        full = [w for w in np.flatnonzero(suspect) if windows[w][1] > windows[w][0]]
        if full:
            strain[:, full], lopt[:, full], _ = _window_peaks(sampled, arrays, nominal, [windows[w] for w in full],
                                                              [np.arange(*windows[w]) for w in full])
        out[muscle] = (strain, lopt)
    return out


def _peak_search_frames(nominal: np.ndarray, start: int, stop: int, margin_m: float) -> np.ndarray:
    window = nominal[start:stop]
    finite = np.isfinite(window)
    if not finite.any():
        return np.arange(start, stop)
    return start + np.flatnonzero(finite & (window >= np.max(window[finite]) - margin_m))


def _window_peaks(sampled: _SampledMuscle, arrays, nominal: np.ndarray, windows: list[tuple[int, int]],
                  frames_per_window: list[np.ndarray]):
    """Peaks over the given frames of each window ([S, W] strain and l/l_opt) and, per window, whether a sample's
    length peaks on an open edge of those frames (a finite neighbour inside the window left out)."""
    n_windows = len(frames_per_window)
    n_samples = sampled.upright_length_m.shape[0]
    strain = np.full((n_samples, n_windows), np.nan)
    lopt = np.full((n_samples, n_windows), np.nan)
    suspect = np.zeros(n_windows, dtype=bool)
    counts = np.array([f.size for f in frames_per_window])
    used = np.flatnonzero(counts)
    if used.size == 0:
        return strain, lopt, suspect
    frames = np.concatenate([frames_per_window[w] for w in used])
    offsets = np.concatenate([[0], np.cumsum(counts[used])[:-1]])
    length = _path_length(sampled.paths, *(a[frames] for a in arrays))  # [S, N]
    # Strain and l/l_opt are non-decreasing functions of the length, step by step also in floating point
    # (``fibre_length``), so each window's peaks are those of its peak length: worked out on [S, W], not [S, N].
    window_peak_length = np.fmax.reduceat(length, offsets, axis=1)
    strain[:, used], lopt[:, used] = sampled.strain_and_lopt(window_peak_length)
    owner = np.repeat(np.arange(used.size), counts[used])
    starts = np.array([windows[w][0] for w in used])[owner]
    stops = np.array([windows[w][1] for w in used])[owner]
    finite = np.concatenate([[False], np.isfinite(nominal), [False]])  # index frame + 1
    contiguous = (frames[1:] == frames[:-1] + 1) & (owner[1:] == owner[:-1])
    open_before = ~np.concatenate([[False], contiguous]) & (frames - 1 >= starts) & finite[frames]
    open_after = ~np.concatenate([contiguous, [False]]) & (frames + 1 < stops) & finite[frames + 2]
    peak_length = window_peak_length[:, owner]
    at_peak = length == peak_length
    bad = at_peak & (open_before | open_after)[None, :]
    suspect[used] = np.logical_or.reduceat(bad.any(axis=0), offsets)
    return strain, lopt, suspect


def peak_band(samples: np.ndarray, start: int, stop: int, q=(5, 95)) -> tuple[float, float]:
    """Percentiles (default 5th and 95th) over samples of each sample's peak within frames [start, stop)."""
    window = np.asarray(samples)[:, start:stop]
    if window.shape[1] == 0:
        raise MuscleModelError(f"empty frame window {start}:{stop} for the uncertainty band")
    peaks = np.nanmax(window, axis=1)
    low, high = np.nanpercentile(peaks, q)
    return float(low), float(high)


def peak_difference_band(samples_a: np.ndarray, window_a: tuple[int, int], samples_b: np.ndarray,
                         window_b: tuple[int, int], q=(5, 95)) -> tuple[float, float]:
    """Percentiles of the paired difference of peaks, a - b, for samples drawn with the same seed (e.g. the two
    legs of one athlete): what remains of the model uncertainty when both legs share the same anatomy."""
    peaks_a = np.nanmax(np.asarray(samples_a)[:, window_a[0]:window_a[1]], axis=1)
    peaks_b = np.nanmax(np.asarray(samples_b)[:, window_b[0]:window_b[1]], axis=1)
    if peaks_a.shape != peaks_b.shape:
        raise MuscleModelError("paired uncertainty bands need the same number of samples on both sides")
    low, high = np.nanpercentile(peaks_a - peaks_b, q)
    return float(low), float(high)


# --------------------------------------------------------------------------------------------------------------
# Practitioner views
# --------------------------------------------------------------------------------------------------------------
def muscle_table(hip_flexion_deg: float, knee_flexion_deg: float, dims: MuscleDims, *,
                 hip_adduction_deg: float = 0.0, hip_rotation_deg: float = 0.0) -> pd.DataFrame:
    """One row per muscle at one posture: length, strain vs upright, l/l_opt (tendon at its F0 stretch, with the
    slack length it rests on) and at rest (no force, tendon at its slack length)
    and the four moment arms in mm (r = -dL/dtheta; negative at the hip = extensor, positive at the knee = flexor)."""
    import pandas as pd

    posture = [np.deg2rad(v) for v in (hip_flexion_deg, hip_adduction_deg, hip_rotation_deg, knee_flexion_deg)]
    rows = []
    for muscle in MUSCLES:
        path = muscle_path(muscle, dims)
        arch = ARCHITECTURE[muscle]
        length = float(_path_length(path, *posture))
        upright = float(_path_length(path, 0.0, 0.0, 0.0, 0.0))
        slack = float(tendon_slack_length(muscle, dims, geometry=path))
        fibre, _ = fibre_length(length, slack, arch.optimal_fibre_length_m, arch.pennation_rad)
        resting, _ = fibre_length(length, slack, arch.optimal_fibre_length_m, arch.pennation_rad, 0.0)
        arms = moment_arms(muscle, *posture, dims, geometry=path) * 1000.0
        rows.append({
            "muscle": muscle, "length_m": length, "strain_pct": 100.0 * (length / upright - 1.0),
            "fibre_length_lopt": float(fibre) / arch.optimal_fibre_length_m,
            "resting_fibre_length_lopt": float(resting) / arch.optimal_fibre_length_m,
            "tendon_slack_length_m": slack,
            "hip_flexion_arm_mm": float(arms[0]), "hip_adduction_arm_mm": float(arms[1]),
            "hip_rotation_arm_mm": float(arms[2]), "knee_flexion_arm_mm": float(arms[3]),
        })
    return pd.DataFrame(rows)


def moment_arm_curves(dims: MuscleDims, hip_flexion_deg: float = 0.0,
                      knee_flexion_deg: float = 0.0) -> dict[str, dict[str, np.ndarray]]:
    """Moment-arm curves through one posture, with the sign of :func:`muscle_table` (r = -dL/dtheta, mm).

    ``hip``: hip flexion -20..120 deg at the given knee flexion; ``knee``: knee flexion 0..140 deg at the given hip
    flexion. Returns ``{"hip": {"angle_deg": ..., muscle: arm_mm}, "knee": {...}}`` (BFsh has no hip curve)."""
    hip_deg = np.linspace(-20.0, 120.0, 141)
    knee_deg = np.linspace(0.0, 140.0, 141)
    hip: dict[str, np.ndarray] = {"angle_deg": hip_deg}
    knee: dict[str, np.ndarray] = {"angle_deg": knee_deg}
    for muscle in MUSCLES:
        if muscle in BIARTICULAR:
            hip[muscle] = 1000.0 * moment_arms(muscle, np.deg2rad(hip_deg), 0.0, 0.0, np.deg2rad(knee_flexion_deg),
                                               dims)[:, 0]
        knee[muscle] = 1000.0 * moment_arms(muscle, np.deg2rad(hip_flexion_deg), 0.0, 0.0, np.deg2rad(knee_deg),
                                            dims)[:, 3]
    return {"hip": hip, "knee": knee}


def plot_moment_arms(path, dims: MuscleDims, hip_flexion_deg: float = 0.0, knee_flexion_deg: float = 0.0) -> Path:
    """Draw the hip-flexion and knee-flexion moment-arm curves of every muscle through the asked posture to a PNG.

    Same sign as the ``muscles`` table (r = -dL/dtheta: negative at the hip = extensor, positive at the knee =
    flexor); the asked posture is marked on every curve. Colours and markers: the one palette of
    :mod:`hamstride.style`."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .style import MUSCLE_SHORT, muscle_style

    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    curves = moment_arm_curves(dims, hip_flexion_deg, knee_flexion_deg)
    asked = {"hip": hip_flexion_deg, "knee": knee_flexion_deg}
    fig, (ax_hip, ax_knee) = plt.subplots(1, 2, figsize=(10, 4.2), constrained_layout=True)
    for joint, ax in (("hip", ax_hip), ("knee", ax_knee)):
        angle = curves[joint]["angle_deg"]
        for muscle in MUSCLES:
            if muscle not in curves[joint]:
                continue
            style = muscle_style(muscle)
            arm = curves[joint][muscle]
            ax.plot(angle, arm, color=style["color"], linestyle=style["linestyle"], linewidth=2.0,
                    label=f"{MUSCLE_SHORT[muscle]} ({MUSCLE_NAMES[muscle]})")
            ax.plot([asked[joint]], [np.interp(asked[joint], angle, arm)], marker=style["marker"],
                    color=style["color"], markeredgecolor="black", markersize=7, ls="none")
        ax.axvline(asked[joint], color="#555555", lw=0.8, ls=":")
        ax.axhline(0.0, color="#555555", lw=0.6)
        ax.grid(True, alpha=0.3)
    ax_hip.set(xlabel=f"hip flexion (deg), knee flexion {knee_flexion_deg:g} deg",
               ylabel="hip flexion moment arm r = -dL/dθ (mm)",
               title="hip (negative = extensor; BFsh does not cross the hip)")
    ax_knee.set(xlabel=f"knee flexion (deg), hip flexion {hip_flexion_deg:g} deg",
                ylabel="knee flexion moment arm r = -dL/dθ (mm)", title="knee (positive = flexor)")
    ax_knee.legend(fontsize=8, loc="best")
    fig.suptitle(f"hamstride hamstring model through hip {hip_flexion_deg:g} deg, knee {knee_flexion_deg:g} deg "
                 f"(markers): thigh {dims.thigh_length_m:.3f} m, shank {dims.shank_length_m:.3f} m, "
                 f"pelvis width {dims.pelvis_width_m:.3f} m", fontsize=10)
    fig.savefig(out, dpi=120)
    plt.close(fig)
    return out


# --------------------------------------------------------------------------------------------------------------
# Monte Carlo states for the force and work band
# --------------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class SampledStates:
    """One muscle's Monte Carlo kinematics over the frames: fibre length and velocity (l_opt, l_opt/s), MTU
    velocity (m/s) and sagittal moment arms [S, F, 2] (hip flexion, knee flexion), with the sample's l_opt and
    pennation at optimal length [S, 1]."""

    fibre_length_lopt: np.ndarray
    velocity_lopt_per_s: np.ndarray
    velocity_m_per_s: np.ndarray
    moment_arms_m: np.ndarray
    optimal_fibre_length_m: np.ndarray
    pennation_rad: np.ndarray


def monte_carlo_states(angles: dict[str, np.ndarray], dims: MuscleDims, rate_hz: float, n_samples: int,
                       seed: int = 0, *, include_hip_centre_error: bool = True,
                       tendon_force_norm: dict[str, np.ndarray] | None = None,
                       tendon_strain_scale=1.0, frames: np.ndarray | None = None) -> dict[str, SampledStates]:
    """Per-sample fibre lengths, velocities and moment arms of every muscle ([S, F]), from the same draws as
    ``monte_carlo_lengths`` (attachments, hip centre, l_opt, pennation, slack rule), for the force band; each
    tendon stretched by ``tendon_force_norm[muscle]`` ([F], F0 units; default the reference force) times
    ``tendon_strain_scale`` ([S, 1] or a number). Fibre velocity = MTU velocity along the fibres (see
    ``dynamics._compliant_fibres``). ``frames``: evaluate only these frames (rates still from all of them)."""
    arrays = _angle_arrays(angles)
    rates = np.stack([np.gradient(a, 1.0 / rate_hz) if a.size > 1 else np.zeros_like(a) for a in arrays], axis=-1)
    if frames is not None:
        arrays, rates = [a[frames] for a in arrays], rates[frames]
    out = {}
    for muscle, sampled in _draw_samples(dims, n_samples, seed, include_hip_centre_error):
        length, arms = _length_and_moment_arms(sampled.paths, *arrays)  # [S, F], [S, F, 4]
        force = REFERENCE_TENDON_FORCE if tendon_force_norm is None else np.nan_to_num(
            np.asarray(tendon_force_norm[muscle], dtype=float), nan=0.0)
        if frames is not None and np.ndim(force):
            force = force[frames]
        fibre, pennation = fibre_length(length, sampled.slack_length_m, sampled.optimal_fibre_length_m,
                                        sampled.pennation_rad, force, tendon_strain_scale)
        velocity = -np.sum(arms * rates, axis=-1)
        out[muscle] = SampledStates(fibre / sampled.optimal_fibre_length_m,
                                    velocity * np.cos(pennation) / sampled.optimal_fibre_length_m, velocity,
                                    arms[..., [0, 3]], sampled.optimal_fibre_length_m, sampled.pennation_rad)
    return out
