"""Joint angles by the joint coordinate system (Grood & Suntay 1983, J Biomech Eng 105:136; ISB, Wu et al. 2002).

The JCS with e1 = proximal Z (flexion), e3 = distal Y (axial rotation) and the floating e2 = e3 x e1 (ab/adduction)
equals the intrinsic Z-X-Y Cardan decomposition of R = R_prox^T R_dist. Signs (DEVELOPERS.md): hip flexion = +Z,
knee flexion = -Z, ankle dorsiflexion = +Z; adduction = +X and internal rotation = +Y on the right, both negated
on the left so the same anatomical motion has the same sign. Radians inside; degrees only at the edges.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

import numpy as np

from .numerics import SIDES
from .segments import Body

__all__ = ["ANGLE_NAMES", "jcs_angles", "JointAngles", "to_degrees", "joint_angles"]

ANGLE_NAMES = ("hip_flexion", "hip_adduction", "hip_rotation", "knee_flexion", "knee_adduction", "knee_rotation",
               "ankle_dorsiflexion")


def jcs_angles(prox_axes: np.ndarray, dist_axes: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Intrinsic Z-X-Y Cardan angles (a_z, a_x, a_y) of R = prox^T dist, closed form, shapes [F, 3, 3] -> [F].

    R = Rz(a) Rx(b) Ry(c) has R[2,1] = sin b, R[0,1] = -sin a cos b, R[1,1] = cos a cos b,
    R[2,0] = -cos b sin c, R[2,2] = cos b cos c; b lies in [-pi/2, pi/2] (same branch as scipy's as_euler("ZXY")).
    """
    r = np.swapaxes(prox_axes, -1, -2) @ dist_axes
    a_z = np.arctan2(-r[..., 0, 1], r[..., 1, 1])
    a_x = np.arctan2(r[..., 2, 1], np.hypot(r[..., 0, 1], r[..., 1, 1]))
    a_y = np.arctan2(-r[..., 2, 0], r[..., 2, 2])
    return a_z, a_x, a_y


@dataclass(frozen=True)
class JointAngles:
    """Per side, the angles named in ANGLE_NAMES in radians, each [F]."""

    rate_hz: float
    by_side: Mapping[str, Mapping[str, np.ndarray]]

    def __getitem__(self, side: str) -> Mapping[str, np.ndarray]:
        return self.by_side[side]

    def angle(self, side: str, name: str) -> np.ndarray:
        return self.by_side[side][name]

    def degrees(self, side: str, name: str) -> np.ndarray:
        """For files and reports only."""
        return to_degrees(self.by_side[side][name])


def to_degrees(radians: np.ndarray) -> np.ndarray:
    return np.degrees(radians)


def joint_angles(body: Body) -> JointAngles:
    """Hip (pelvis -> thigh), knee (thigh -> shank) and ankle (shank -> foot) JCS angles for both sides."""
    out = {}
    for side in SIDES:
        mirror = 1.0 if side == "right" else -1.0
        hz, hx, hy = jcs_angles(body.pelvis.axes, body.thigh[side].axes)
        kz, kx, ky = jcs_angles(body.thigh[side].axes, body.shank[side].axes)
        az, _, _ = jcs_angles(body.shank[side].axes, body.foot[side].axes)
        out[side] = {
            "hip_flexion": hz,
            "hip_adduction": mirror * hx,
            "hip_rotation": mirror * hy,
            "knee_flexion": -kz,
            "knee_adduction": mirror * kx,
            "knee_rotation": mirror * ky,
            "ankle_dorsiflexion": az,
        }
    return JointAngles(rate_hz=body.rate_hz, by_side=out)
