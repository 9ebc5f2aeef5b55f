"""Swing-phase dynamics: net hip and knee moments, muscle forces, muscle power and lengthening work.

While the foot is off the ground no external force acts on the leg but gravity, so the net joint moments follow
from the leg's own motion (Newton-Euler from the foot up; Winter 2009, Biomechanics and Motor Control of Human
Movement, ch. 5, in its 3D form). Segment masses and inertias come from de Leva 1996 (J Biomech 29:1223, Table 4).
The sagittal hip and knee moments are shared among the muscles by static optimisation, minimising the sum of
squared activations (Crowninshield & Brand 1981, J Biomech 14:793) plus a heavily weighted residual moment, one
strictly convex problem whose solution is unique and continuous whether or not the muscles can meet the moments.
Power and work follow the sign conventions of DEVELOPERS.md: power delivered by a muscle = -F*v (v = dL/dt,
lengthening positive); negative work = the energy a muscle absorbs while it lengthens under force, reported as a
positive number of joules.

Everything is vectorised over frames; moments are NaN outside the swing phases.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Callable, Mapping, NamedTuple, Sequence

import numpy as np

from . import muscles as mus
from .errors import HamstrideError
from .numerics import cross_rows, dot_rows, finite_points
from .muscles import MuscleState

if TYPE_CHECKING:  # pragma: no cover - type hints only
    from .segments import Frames

GRAVITY_M_PER_S2 = 9.81
SEGMENTS = ("thigh", "shank", "foot")
SEXES = ("male", "female")


class BodyMassMissing(HamstrideError):
    """Inverse dynamics and muscle forces need the athlete's body mass."""

    code = "body_mass_missing"


BODY_MASS_MISSING_MESSAGE = (
    "no body mass for this athlete: joint moments, muscle forces, power and work need it and are left empty "
    "(lengths, strain and lengthening velocity do not need it and are reported). Add body_mass_kg to "
    "athletes.csv or pass --body-mass"
)


# --------------------------------------------------------------------------- segment inertia (de Leva 1996)
@dataclass(frozen=True)
class SegmentParams:
    """One row of de Leva 1996, Table 4: fractions of body mass and of segment length.

    ``com_fraction`` is measured from the proximal endpoint (thigh: hip centre, shank: knee centre, foot: heel).
    Radii of gyration about the segment's sagittal (antero-posterior), transverse (medio-lateral) and longitudinal
    axes, as fractions of segment length.
    """

    mass_fraction: float
    com_fraction: float
    r_sagittal: float
    r_transverse: float
    r_longitudinal: float


# de Leva P. (1996) Adjustments to Zatsiorsky-Seluyanov's segment inertia parameters. J Biomech 29:1223-1230,
# Table 4 (values transcribed in references.md, status [V]).
DE_LEVA_1996: dict[tuple[str, str], SegmentParams] = {
    ("thigh", "male"): SegmentParams(0.1416, 0.4095, 0.329, 0.329, 0.149),
    ("thigh", "female"): SegmentParams(0.1478, 0.3612, 0.369, 0.364, 0.162),
    ("shank", "male"): SegmentParams(0.0433, 0.4459, 0.255, 0.249, 0.103),
    ("shank", "female"): SegmentParams(0.0481, 0.4416, 0.271, 0.267, 0.093),
    ("foot", "male"): SegmentParams(0.0137, 0.4415, 0.257, 0.245, 0.124),
    ("foot", "female"): SegmentParams(0.0129, 0.4014, 0.299, 0.279, 0.139),
}

# de Leva's segment endpoints as we measure them. The shank ends at the lateral malleolus in de Leva; we use the
# ankle centre (mid-malleoli), a few millimetres away along the same line: the difference in length is well inside
# the spread of the table itself.
SEGMENT_ENDPOINTS = {
    "thigh": ("hip centre", "knee centre"),
    "shank": ("knee centre", "ankle centre (de Leva: lateral malleolus)"),
    "foot": ("heel", "toe tip"),
}


@dataclass(frozen=True)
class SegmentInertia:
    """Mass, centre-of-mass position and central inertia tensor of one segment.

    ``inertia_local`` is about the centre of mass in the segment axes (X anterior, Y proximal, Z right; kg m^2).
    Thigh and shank: longitudinal = Y, sagittal (antero-posterior) = X, transverse (medio-lateral) = Z.
    Foot: longitudinal = X (heel to toe), transverse = Z, sagittal radius used about the remaining axis Y.
    """

    segment: str
    mass_kg: float
    length_m: float
    com_fraction: float
    inertia_local: np.ndarray = field(repr=False)


def _normalise_sex(sex: str | None) -> str:
    s = (sex or "male").strip().lower()
    if s in ("m", "male", "man"):
        return "male"
    if s in ("f", "female", "woman"):
        return "female"
    raise HamstrideError(
        f"sex {sex!r} is not one of male/female (M/F); de Leva's tables need one of the two", code="config"
    )


def leg_inertia(
    body_mass_kg: float | None,
    sex: str | None,
    thigh_length_m: float,
    shank_length_m: float,
    foot_length_m: float,
) -> dict[str, SegmentInertia]:
    """Thigh, shank and foot inertia scaled to body mass and measured segment lengths (de Leva 1996, Table 4).

    m = mass_fraction * body mass; I = m * (r * L)^2 about the centre of mass. ``sex`` None defaults to male.
    Raises ``BodyMassMissing`` when body mass is absent or not positive.
    """
    if body_mass_kg is None or not np.isfinite(body_mass_kg) or body_mass_kg <= 0:
        raise BodyMassMissing(BODY_MASS_MISSING_MESSAGE)
    s = _normalise_sex(sex)
    lengths = {"thigh": thigh_length_m, "shank": shank_length_m, "foot": foot_length_m}
    out = {}
    for seg in SEGMENTS:
        p = DE_LEVA_1996[(seg, s)]
        length = float(lengths[seg])
        if not np.isfinite(length) or length <= 0:
            raise HamstrideError(
                f"{seg} length {length!r} m is not positive; check the {SEGMENT_ENDPOINTS[seg][0]} and "
                f"{SEGMENT_ENDPOINTS[seg][1]} landmarks",
                code="implausible",
            )
        mass = p.mass_fraction * float(body_mass_kg)
        i_sag, i_trans, i_long = (mass * (r * length) ** 2 for r in (p.r_sagittal, p.r_transverse, p.r_longitudinal))
        diag = (i_long, i_sag, i_trans) if seg == "foot" else (i_sag, i_long, i_trans)
        out[seg] = SegmentInertia(seg, mass, length, p.com_fraction, np.diag(diag))
    return out


# --------------------------------------------------------------------------- rigid-body kinematics
def _derivative(x: np.ndarray, rate_hz: float, frame_axis: int) -> np.ndarray:
    """Central differences along the frame axis (second order, also at the ends)."""
    if x.shape[frame_axis] < 3:
        return np.full_like(x, np.nan, dtype=float)
    return np.gradient(x, 1.0 / rate_hz, axis=frame_axis, edge_order=2)


def angular_velocity(axes: np.ndarray, rate_hz: float) -> np.ndarray:
    """Angular velocity in the lab [..., F, 3] from rotation matrices [..., F, 3, 3] (segment -> lab).

    dR/dt R^T is the skew-symmetric angular-velocity tensor of rigid-body kinematics; keeping only its skew part
    removes the non-orthogonal error of numerical differentiation.
    """
    r_dot = _derivative(axes, rate_hz, frame_axis=-3)

    def w(i, j):  # element (i, j) of dR/dt R^T: row i of dR/dt dotted with row j of R
        return dot_rows(r_dot[..., i, :], axes[..., j, :])

    return 0.5 * np.stack([w(2, 1) - w(1, 2), w(0, 2) - w(2, 0), w(1, 0) - w(0, 1)], axis=-1)


# --------------------------------------------------------------------------- inverse dynamics
@dataclass(frozen=True)
class JointMoments:
    """Net joint moments (N m) during swing, exerted by the proximal on the distal segment.

    ``hip``, ``knee``, ``ankle`` [F,3] are expressed in the proximal segment's axes with anatomical signs:
    component 0 = flexion (hip flexion, knee flexion, ankle dorsiflexion positive; the knee's is minus the moment
    about the thigh Z axis because knee flexion is a -Z rotation), component 1 = adduction (+X on the right, -X on
    the left), component 2 = internal rotation (+Y on the right, -Y on the left).
    ``*_lab`` hold the same moments and the joint reaction forces (N, on the distal segment) in the lab frame.
    ``valid`` marks swing frames with finite results; everything else is NaN.
    """

    hip: np.ndarray
    knee: np.ndarray
    ankle: np.ndarray
    hip_lab: np.ndarray
    knee_lab: np.ndarray
    ankle_lab: np.ndarray
    hip_force_lab: np.ndarray
    knee_force_lab: np.ndarray
    ankle_force_lab: np.ndarray
    valid: np.ndarray
    rate_hz: float

    @property
    def hip_flexion_nm(self) -> np.ndarray:
        return self.hip[:, 0]

    @property
    def knee_flexion_nm(self) -> np.ndarray:
        return self.knee[:, 0]

    @property
    def ankle_dorsiflexion_nm(self) -> np.ndarray:
        return self.ankle[:, 0]

    def per_kg(self, body_mass_kg: float) -> dict[str, np.ndarray]:
        """Flexion moments normalised to body mass (N m/kg), as exported in curves.csv."""
        return {
            "hip_moment_nm_per_kg": self.hip_flexion_nm / body_mass_kg,
            "knee_moment_nm_per_kg": self.knee_flexion_nm / body_mass_kg,
        }


def _segment_step(
    axes: np.ndarray,
    com: np.ndarray,
    proximal: np.ndarray,
    distal: np.ndarray | None,
    mass_kg: np.ndarray | float,
    inertia_local: np.ndarray,
    rate_hz: float,
    gravity_vec: np.ndarray,
    distal_force: np.ndarray | None,
    distal_moment: np.ndarray | None,
) -> tuple[np.ndarray, np.ndarray]:
    """Newton-Euler for one segment: force and moment the proximal neighbour exerts on it (lab, about ``proximal``).

    m a = F_p - F_d + m g;  I w' + w x I w = M_p - M_d + (P - C) x F_p - (D - C) x F_d, where F_d, M_d are what
    this segment exerts on its distal neighbour (Winter 2009, ch. 5; the Euler equations in the lab frame).
    Points [..., F, 3], axes [..., F, 3, 3]; leading axes (legs) broadcast with ``mass_kg`` [..., 1, 1] and
    ``inertia_local`` [..., 1, 3, 3].
    """
    acc = _derivative(_derivative(com, rate_hz, -2), rate_hz, -2)
    omega = angular_velocity(axes, rate_hz)
    alpha = _derivative(omega, rate_hz, -2)

    def inertia_times(v):  # I_lab v = R (I_local (R^T v)), without forming I_lab
        local = np.einsum("...jk,...j->...k", axes, v)
        return np.einsum("...jk,...k->...j", axes, np.einsum("...jk,...k->...j", inertia_local, local))

    h_dot = inertia_times(alpha) + cross_rows(omega, inertia_times(omega))
    force = mass_kg * (acc - gravity_vec)
    moment = h_dot - cross_rows(proximal - com, force)
    if distal_force is not None:
        force = force + distal_force
        moment = (moment - cross_rows(proximal - com, distal_force) + distal_moment
                  + cross_rows(distal - com, distal_force))
    return force, moment


def _side_sign(side: str) -> float:
    if side not in ("left", "right"):
        raise HamstrideError(f"side must be 'left' or 'right', not {side!r}", code="config")
    return 1.0 if side == "right" else -1.0


def _anatomical(moment_lab: np.ndarray, prox_axes: np.ndarray, side_sign, flexion_sign: float) -> np.ndarray:
    """Lab moments [..., F, 3] in the proximal axes with anatomical signs; ``side_sign`` +1 right, -1 left
    ([..., 1] for stacked legs)."""
    local = np.einsum("...jk,...j->...k", prox_axes, moment_lab)  # along the proximal X, Y, Z
    return np.stack([flexion_sign * local[..., 2], side_sign * local[..., 0], side_sign * local[..., 1]], axis=-1)


def swing_inverse_dynamics(
    thigh: Frames,
    shank: Frames,
    foot: Frames,
    hip_centre: np.ndarray,
    knee_centre: np.ndarray,
    ankle_centre: np.ndarray,
    heel: np.ndarray,
    toe: np.ndarray,
    rate_hz: float,
    inertia: Mapping[str, SegmentInertia],
    swing_mask: np.ndarray | None = None,
    gravity: float = GRAVITY_M_PER_S2,
    pelvis: Frames | None = None,
    side: str = "right",
) -> JointMoments:
    """Net ankle, knee and hip moments of a swinging leg, in 3D, from the foot up (no external force but gravity).

    Segment centres of mass lie on de Leva's endpoint lines (thigh hip->knee centre, shank knee->ankle centre,
    foot heel->toe). Linear accelerations are second central differences of the centre-of-mass paths; angular
    velocity is the skew part of dR/dt R^T and angular acceleration its derivative, so the kinematics must already
    be low-pass filtered (one cutoff for all markers, see ``signal``). Hip moments are expressed in the pelvis axes
    when ``pelvis`` is given, otherwise in the thigh axes; knee moments in the thigh axes; ankle in the shank axes.
    Frames outside ``swing_mask`` (default: all frames) are NaN.
    """
    leg = SwingLeg(thigh, shank, foot, hip_centre, knee_centre, ankle_centre, heel, toe, inertia, swing_mask, side)
    return swing_inverse_dynamics_of_legs([leg], rate_hz, gravity=gravity, pelvis=pelvis)[0]


class SwingLeg(NamedTuple):
    """One leg's input to ``swing_inverse_dynamics_of_legs`` (the arguments of ``swing_inverse_dynamics``)."""

    thigh: Frames
    shank: Frames
    foot: Frames
    hip_centre: np.ndarray
    knee_centre: np.ndarray
    ankle_centre: np.ndarray
    heel: np.ndarray
    toe: np.ndarray
    inertia: Mapping[str, SegmentInertia]
    swing_mask: np.ndarray | None = None
    side: str = "right"


def swing_inverse_dynamics_of_legs(legs: Sequence[SwingLeg], rate_hz: float, *, gravity: float = GRAVITY_M_PER_S2,
                                   pelvis: Frames | None = None) -> list[JointMoments]:
    """``swing_inverse_dynamics`` for several legs of one trial (same frames) in one pass: the legs are stacked on
    a leading axis, so every step runs once for all of them; the same moments as leg by leg."""
    g = np.array([0.0, 0.0, -gravity])

    def stacked(get):
        return np.stack([np.asarray(get(leg), dtype=float) for leg in legs])

    hip_centre, knee_centre, ankle_centre, heel, toe = (
        stacked(lambda leg, k=k: leg[k]) for k in range(3, 8))
    axes = {seg: stacked(lambda leg, seg=seg: getattr(leg, seg).axes) for seg in SEGMENTS}

    def inertia(seg):  # [L, 1, 1] masses, [L, 1, 3, 3] inertia tensors, [L, 1, 1] centre-of-mass fractions
        props = [leg.inertia[seg] for leg in legs]
        return (np.array([p.mass_kg for p in props])[:, None, None], np.stack([p.inertia_local for p in props])[:, None],
                np.array([p.com_fraction for p in props])[:, None, None])

    (m_foot, i_foot, c_foot), (m_shank, i_shank, c_shank), (m_thigh, i_thigh, c_thigh) = (
        inertia(seg) for seg in ("foot", "shank", "thigh"))
    com_thigh = hip_centre + c_thigh * (knee_centre - hip_centre)
    com_shank = knee_centre + c_shank * (ankle_centre - knee_centre)
    com_foot = heel + c_foot * (toe - heel)
    f_ankle, m_ankle = _segment_step(axes["foot"], com_foot, ankle_centre, None, m_foot, i_foot, rate_hz, g, None,
                                     None)
    f_knee, m_knee = _segment_step(axes["shank"], com_shank, knee_centre, ankle_centre, m_shank, i_shank, rate_hz, g,
                                   f_ankle, m_ankle)
    f_hip, m_hip = _segment_step(axes["thigh"], com_thigh, hip_centre, knee_centre, m_thigh, i_thigh, rate_hz, g,
                                 f_knee, m_knee)
    n = hip_centre.shape[1]
    side_sign = np.array([_side_sign(leg.side) for leg in legs])[:, None]
    hip_axes = np.asarray(pelvis.axes, dtype=float) if pelvis is not None else axes["thigh"]
    hip = _anatomical(m_hip, hip_axes, side_sign, 1.0)
    knee = _anatomical(m_knee, axes["thigh"], side_sign, -1.0)
    ankle = _anatomical(m_ankle, axes["shank"], side_sign, 1.0)
    mask = np.stack([np.ones(n, dtype=bool) if leg.swing_mask is None else np.asarray(leg.swing_mask, dtype=bool)
                     for leg in legs])
    valid = mask & finite_points(hip) & finite_points(knee) & finite_points(ankle)
    out = [hip, knee, ankle, m_hip, m_knee, m_ankle, f_hip, f_knee, f_ankle]
    for a in out:
        a[~valid] = np.nan
    return [JointMoments(*(a[k] for a in out), valid=valid[k], rate_hz=float(rate_hz)) for k in range(len(legs))]


def swing_mask_from_events(
    n_frames: int, rate_hz: float, toe_off_s: np.ndarray, foot_strike_s: np.ndarray
) -> np.ndarray:
    """Frames from each toe-off to the next foot strike of the same leg (inclusive), as a boolean mask."""
    t = np.arange(n_frames) / rate_hz
    to = np.sort(np.asarray(toe_off_s, dtype=float))
    fs = np.sort(np.asarray(foot_strike_s, dtype=float))
    mask = np.zeros(n_frames, dtype=bool)
    if to.size == 0 or fs.size == 0:
        return mask
    nxt = np.searchsorted(fs, to, side="right")
    ok = nxt < fs.size
    starts, stops = to[ok], fs[nxt[ok]]
    # frame is in swing if some toe-off <= t <= its next foot strike; vectorised over frames x swings
    inside = (t[:, None] >= starts[None, :] - 0.5 / rate_hz) & (t[:, None] <= stops[None, :] + 0.5 / rate_hz)
    return inside.any(axis=1)


# --------------------------------------------------------------------------- static optimisation
def _exact_step(s, c, grad_dot_d, reserve_dd):
    """Maximiser t >= 0 of the dual along lam + t d.

    Its slope, ``grad.d - sum_i c_i (a_i(t) - a_i(0)) - reserve t |d|^2`` with ``a_i(t) = clip(s_i + t c_i, 0, 1)``,
    is piecewise linear in t with kinks where a muscle's s_i + t c_i crosses 0 or 1: between kinks it falls at the
    rate ``sum_free c_i^2 + reserve |d|^2``, and each kink adds (muscle becomes free) or removes (it saturates) one
    c_i^2. So the slope at every kink follows from a cumulative sum over the sorted kinks, and the maximiser lies by
    linear interpolation inside the first piece where the slope turns non-positive.
    """
    c2 = c * c
    with np.errstate(divide="ignore", invalid="ignore"):
        kinks = np.concatenate([-s / c, (1.0 - s) / c], axis=1)  # crossing 0, crossing 1
    kinks = np.where(kinks > 0, kinks, np.inf)  # NaN and the past never count
    free0 = ((s > 0) & (s < 1)) | ((s == 0) & (c > 0)) | ((s == 1) & (c < 0))
    rate0 = np.where(free0, c2, 0.0).sum(axis=1) + reserve_dd  # fall rate of the slope just after t = 0
    # Most frames (a Newton step whose free set stays free) peak before the first kink: t = slope(0) / rate(0).
    with np.errstate(divide="ignore", invalid="ignore"):
        first_piece = grad_dot_d / rate0
    step = np.where(np.isfinite(first_piece) & (first_piece >= 0), first_piece, 0.0)
    later = ~((rate0 > 0) & (first_piece <= kinks.min(axis=1)))
    if later.any():
        step[later] = _step_past_kinks(s[later], c[later], c2[later], kinks[later], grad_dot_d[later], rate0[later])
    return step


def _step_past_kinks(s, c, c2, kinks, grad_dot_d, rate0):
    """``_exact_step`` for frames whose maximiser lies beyond the first kink: the slope at every sorted kink."""
    rows = np.arange(len(s))
    # crossing 0 upwards (c > 0) frees the muscle, downwards saturates it; crossing 1 the other way round
    change = np.concatenate([np.sign(c) * c2, -np.sign(c) * c2], axis=1)
    order = np.argsort(kinks, axis=1)
    kinks = np.take_along_axis(kinks, order, axis=1)
    finite = np.isfinite(kinks)
    # the infinite kinks sort last and change nothing: keep only as many columns as the most finite ones in a row
    order = order[:, :max(int(finite.sum(axis=1).max()), 1)]
    kinks, finite = kinks[:, :order.shape[1]], finite[:, :order.shape[1]]
    change = np.take_along_axis(change, order, axis=1)
    t = np.concatenate([np.zeros((len(s), 1)), np.where(finite, kinks, 0.0)], axis=1)  # [F, K + 1]
    rate = rate0[:, None] + np.concatenate([np.zeros((len(s), 1)), np.cumsum(np.where(finite, change, 0.0),
                                                                                   axis=1)], axis=1)
    widths = np.where(finite, np.diff(t, axis=1), 0.0)
    slope = grad_dot_d[:, None] - np.concatenate([np.zeros((len(s), 1)), np.cumsum(rate[:, :-1] * widths, axis=1)],
                                                 axis=1)
    known = np.concatenate([np.ones((len(s), 1), dtype=bool), finite], axis=1)
    turned = known & (slope <= 0)
    never = ~turned.any(axis=1)
    k = np.where(never, 1, np.maximum(np.argmax(turned, axis=1), 1))
    k = np.minimum(k, t.shape[1] - 1)
    t_lo, t_hi = t[rows, k - 1], t[rows, k]
    s_lo, s_hi = slope[rows, k - 1], slope[rows, k]
    with np.errstate(divide="ignore", invalid="ignore"):
        inside = t_lo + s_lo * (t_hi - t_lo) / (s_lo - s_hi)
        # beyond the last kink the slope falls at the final rate (only the reserve term, or zero: unbounded dual)
        n_known = known.sum(axis=1) - 1
        last, s_last, r_last = t[rows, n_known], slope[rows, n_known], rate[rows, n_known]
        beyond = np.where(r_last > 0, last + s_last / r_last, np.maximum(2.0 * last, 1.0))
    step = np.where(never, beyond, inside)
    return np.where(np.isfinite(step) & (step >= 0), step, 0.0)


def _transpose_times(a_mat, lam):
    """A^T lam for every frame: [F, 2, m] x [F, 2] -> [F, m]."""
    return a_mat[:, 0, :] * lam[:, 0, None] + a_mat[:, 1, :] * lam[:, 1, None]


def _solve_2x2(h00, h01, h11, g):
    """Solution of the symmetric positive definite systems [[h00, h01], [h01, h11]] x = g, every frame."""
    det = h00 * h11 - h01 * h01
    return np.stack([(h11 * g[:, 0] - h01 * g[:, 1]) / det, (h00 * g[:, 1] - h01 * g[:, 0]) / det], axis=1)


def _solve_dual(a_mat, b, lam, reserve, max_iter, tol, scale):
    """Semi-smooth Newton ascent with exact line search on the concave dual, all unconverged frames at once.

    Dual of min 1/2 |a|^2 + |e|^2 / (2 reserve) s.t. A a + e = b, 0 <= a <= 1: a = clip(A^T lam), e = reserve lam;
    gradient b - A a - reserve lam; generalised Hessian A_F A_F^T + reserve I over the free (unbounded) muscles F.
    Frames are independent, so each iteration works only on the frames not yet converged (kept packed; each frame's
    multipliers are written back when it converges). ``reserve`` is one number for all frames.
    """
    lam = lam.copy()
    index = np.arange(len(lam))
    ridge = reserve + 1e-10 * scale
    a_scale = np.abs(a_mat).max(axis=(1, 2))
    a_act, b_act, l_act = a_mat, b, lam
    for _ in range(max_iter):
        s = _transpose_times(a_act, l_act)
        grad = b_act - np.einsum("fjm,fm->fj", a_act, np.clip(s, 0.0, 1.0)) - reserve * l_act
        # rounding floor: s = A^T lam loses about 1e-16 |A| |lam| when lam is large (frames far beyond capacity)
        floor = 1e-13 * np.abs(l_act).max(axis=1) * a_scale
        todo = np.abs(grad).max(axis=1) > tol + floor
        if not todo.all():
            lam[index] = l_act
            if not todo.any():
                return lam
            index, a_act, b_act, l_act, s, grad = index[todo], a_act[todo], b_act[todo], l_act[todo], s[todo], grad[todo]
            ridge, a_scale = ridge[todo], a_scale[todo]
        free = (s > 0) & (s < 1)
        a0, a1 = np.where(free, a_act[:, 0, :], 0.0), np.where(free, a_act[:, 1, :], 0.0)
        direction = _solve_2x2((a0 * a0).sum(axis=1) + ridge, (a0 * a1).sum(axis=1), (a1 * a1).sum(axis=1) + ridge,
                               grad)
        c = _transpose_times(a_act, direction)
        step = _exact_step(s, c, (grad * direction).sum(axis=1), reserve * (direction * direction).sum(axis=1))
        l_act = l_act + step[:, None] * direction
    lam[index] = l_act
    return lam


#: Weight w of the capacity-normalised moment residual against the activations in the sharing problem (see
#: ``share_forces``). Assumption, no source: large, so that frames inside the muscles' capacity reproduce the moments
#: to about 1e-10 of the total capacity S (the minimum-activation solution of Crowninshield & Brand), while the dual
#: stays strongly concave and converges on every frame. A smaller w (e.g. 100) rounds off the steep approach to the
#: capacity limit (a muscle going from part to full activation within one frame) at the cost of residuals of
#: several per cent on reachable frames near the limit.
RESIDUAL_WEIGHT = 1e11

#: A frame's moments count as met when both sagittal residuals are within this fraction of the total muscle
#: capacity S (sum over hip and knee of |moment arm| x capacity of every muscle): about 0.1 N m for 1000 N m.
#: Assumption (common practice: a reserve moment negligible against the net moment).
MOMENT_TOLERANCE = 1e-4


def share_forces(
    moment_arms: np.ndarray,
    max_force: np.ndarray,
    target: np.ndarray,
    weight: float = RESIDUAL_WEIGHT,
    tolerance: float = MOMENT_TOLERANCE,
    max_iter: int = 60,
    *,
    initial_dual: np.ndarray | None = None,
    return_dual: bool = False,
):
    """Static optimisation per frame, as one strictly convex problem on met and unmet frames alike.

    minimise  1/2 sum_m a_m^2 + w/2 sum_j ((M_j - sum_m r_mj a_m Fmax_m) / S)^2   subject to 0 <= a <= 1,

    j = hip, knee; S = sum_mj |r_mj| Fmax_m (+1 N m), the muscles' total capacity (one scale for both joints, so the
    residual is the Euclidean distance of the moments in N m). Minimum squared activation
    is the Crowninshield & Brand 1981 (J Biomech 14:793) criterion with exponent 2; the residual term is a weighted
    reserve moment (reserve actuators, common practice). The objective is strongly convex in a (Hessian >= I), so the
    solution is unique and Lipschitz-continuous in the targets, moment arms and capacities on every frame; where
    the muscles cannot produce the moments it is the regularised closest solution (hard-constraint limit: the
    closest achievable moments, ties broken by minimum activation), where they can, the residual is about 1/w of
    the capacity scale.
    Solved through the dual for all frames at once: a = clip(A~^T lam, 0, 1) with A~_jm = r_mj Fmax_m / S and the
    residual e~ = lam / w; the dual is strongly concave and piecewise quadratic, maximised by semi-smooth Newton
    steps with an exact line search along its kinks.

    moment_arms [F,m,2] (m), max_force [F,m] (N, >= 0; NaN treated as 0), target [F,2] (N m).
    Returns forces [F,m] = a * max_force (NaN where the target or arms are not finite) and met [F]: both residuals
    within ``tolerance`` x S; with ``return_dual`` also the multipliers [F, 2] (NaN on unusable frames), which a
    similar problem may take as ``initial_dual`` (a warm start, fewer Newton steps: the Monte Carlo band). Warm and
    cold starts end within the solver's tolerance, which on frames far beyond capacity leaves the tie-break among
    the saturated muscles loose: forces within 2 % of capacity, moments within 0.5 N m, the same met frames
    (random problems, tested).
    """
    r = np.asarray(moment_arms, dtype=float)
    cap = np.nan_to_num(np.asarray(max_force, dtype=float), nan=0.0).clip(min=0.0)
    b = np.asarray(target, dtype=float)
    if not weight > 0:
        raise HamstrideError(f"residual weight {weight!r} must be positive", code="config")
    usable = np.isfinite(b).all(axis=1) & np.isfinite(r).all(axis=(1, 2))
    forces = np.full(cap.shape, np.nan)
    met = np.zeros(len(b), dtype=bool)
    r, cap_u, b = r[usable], cap[usable], b[usable]  # frames are independent: solve the usable ones only
    a_nm = np.swapaxes(r * cap_u[:, :, None], 1, 2)  # [F, 2, m], N m per unit activation
    # S: one scale for both joints, so the residual is measured in N m alike at hip and knee (closest moments in
    # the Euclidean sense); +1 N m keeps frames without any capacity finite
    joint_scale = np.abs(a_nm).sum(axis=(1, 2))[:, None] + 1.0
    a_mat = a_nm / joint_scale[:, :, None]
    bb = b / joint_scale
    reserve = 1.0 / weight
    g00, g01, g11 = ((a_mat[:, j] * a_mat[:, k]).sum(axis=1) for j, k in ((0, 0), (0, 1), (1, 1)))
    scale = g00 + g11 + 1.0
    lam0 = _solve_2x2(g00 + reserve, g01, g11 + reserve, bb)
    if initial_dual is not None:
        given = np.asarray(initial_dual, dtype=float)[usable]
        lam0 = np.where(np.isfinite(given), given, lam0)
    lam = _solve_dual(a_mat, bb, lam0, reserve, max_iter, 1e-9, scale)
    act = np.clip(_transpose_times(a_mat, lam), 0.0, 1.0)
    residual = np.abs(bb - np.einsum("fjm,fm->fj", a_mat, act))  # fraction of the total capacity S
    met[usable] = (residual <= tolerance).all(axis=1)
    forces[usable] = act * cap_u
    if return_dual:
        dual = np.full((len(usable), 2), np.nan)
        dual[usable] = lam
        return forces, met, dual
    return forces, met


# --------------------------------------------------------------------------- the other muscles
@dataclass(frozen=True)
class OtherMuscle:
    """A non-hamstring muscle in the sharing problem: sagittal moment arms (r = -dL/dtheta) and strength.

    ``volume_share`` (of the athlete's lower-limb muscle volume, Handsfield et al. 2014) / optimal fibre length
    x specific tension gives the maximum isometric force, as for the hamstrings (``muscles.max_isometric_force``;
    pennation not modelled for these, cos ~ 1). Moment arms are functions of the hip and knee flexion angles (rad)
    returning metres.
    """

    code: str
    name: str
    volume_share: float
    optimal_fibre_length_m: float
    hip_moment_arm: Callable[[np.ndarray], np.ndarray]
    knee_moment_arm: Callable[[np.ndarray], np.ndarray]
    source: str
    #: sprinters' volume / the general population's per height x mass: ``muscles.SPRINTER_VOLUME_RATIO`` for hip-
    #: and knee-crossing muscles, 1 where Handsfield et al. 2017 found no difference (gastrocnemius)
    sprinter_volume_ratio: float = mus.SPRINTER_VOLUME_RATIO

    @property
    def volume_ratio_share(self) -> float:
        """Volume share x sprinters' ratio: the muscle's part of the (general-population) limb volume."""
        return self.volume_share * self.sprinter_volume_ratio


def _const(value: float) -> Callable[[np.ndarray], np.ndarray]:
    return lambda angle: np.full(np.shape(angle), value, dtype=float)


def _quadriceps_knee_arm(knee_flexion_rad: np.ndarray) -> np.ndarray:
    """Knee-extension moment arm of the quadriceps (negative: extensor), peaking near 40-60 deg of flexion.

    About 3.5 cm near full extension rising to about 4.5 cm mid-range and falling again in deep flexion (from memory:
    Herzog & Read 1993; Buford et al. 1997, IEEE Trans Rehabil Eng 5:367).
    """
    k = np.clip(np.asarray(knee_flexion_rad, dtype=float), 0.0, np.radians(140))
    return -(0.035 + 0.010 * np.sin(k * np.pi / np.radians(120)).clip(min=0.0))


def _gastrocnemius_knee_arm(knee_flexion_rad: np.ndarray) -> np.ndarray:
    """Knee-flexion moment arm of the gastrocnemius: about 1 cm near extension to 2.5 cm in flexion (from memory)."""
    k = np.clip(np.asarray(knee_flexion_rad, dtype=float), 0.0, np.radians(120))
    return 0.010 + 0.015 * k / np.radians(120)


def _gluteus_hip_arm(hip_flexion_rad: np.ndarray) -> np.ndarray:
    """Hip-extension moment arm of gluteus maximus (negative): about 6.5 cm near neutral, smaller in deep flexion.

    From memory (Németh & Ohlsén 1985, J Biomech 18:129).
    """
    h = np.clip(np.asarray(hip_flexion_rad, dtype=float), np.radians(-30), np.radians(120))
    return -(0.065 - 0.020 * (h / np.radians(90)).clip(min=0.0))


def _adductor_magnus_hip_arm(hip_flexion_rad: np.ndarray) -> np.ndarray:
    """Hip-extension moment arm of the posterior (ischiocondylar) adductor magnus (negative: extensor).

    About 2.5 cm near neutral, rising to about 5.5 cm at 90 deg of flexion: the posterior fibres become strong hip
    extensors as the hip flexes (from memory, unverified: Németh & Ohlsén 1985, J Biomech 18:129; Dostal et al.
    1986, Phys Ther 66:351).
    """
    h = np.clip(np.asarray(hip_flexion_rad, dtype=float), np.radians(-30), np.radians(110))
    return -(0.025 + 0.030 * (h / np.radians(90)).clip(min=0.0, max=1.0))


#: Share of adductor magnus PCSA in its posterior (ischiocondylar, "hamstring") part: assumption (about half of the
#: muscle's volume, from memory, unverified).
ADDUCTOR_MAGNUS_POSTERIOR_FRACTION = 0.5


# Volume shares of the total lower-limb muscle volume: Handsfield et al. 2014 (J Biomech 47:631), Table 2, from
# memory [M]. Optimal fibre lengths: Ward et al. 2009 (Clin Orthop Relat Res 467:1074), from memory [M].
# Moment arms as stated per function / entry.
OTHER_MUSCLES: dict[str, OtherMuscle] = {
    "gmax": OtherMuscle(
        "gmax", "gluteus maximus", 0.121, 0.156, _gluteus_hip_arm, _const(0.0),
        "volume share: Handsfield et al. 2014 [M]; fibre length: Ward et al. 2009 [M]; hip arm: Nemeth & Ohlsen "
        "1985 [M]",
    ),
    "ilps": OtherMuscle(
        "ilps", "iliopsoas (iliacus + psoas)", 0.025 + 0.032, 0.102, _const(0.030), _const(0.0),
        "volume share: Handsfield et al. 2014 [M]; fibre length: Ward et al. 2009 [M]; hip-flexion arm 3 cm [M]",
    ),
    "rf": OtherMuscle(
        "rf", "rectus femoris", 0.037, 0.076, _const(0.040), _quadriceps_knee_arm,
        "volume share: Handsfield et al. 2014 [M]; fibre length: Ward et al. 2009 [M]; hip-flexion arm 4 cm [M]",
    ),
    "vas": OtherMuscle(
        "vas", "vasti (lateralis + medialis + intermedius)", 0.119 + 0.062 + 0.056, 0.090, _const(0.0),
        _quadriceps_knee_arm, "volume share: Handsfield et al. 2014 [M]; fibre length: Ward et al. 2009 [M]",
    ),
    "amag": OtherMuscle(
        "amag", "adductor magnus, posterior (ischiocondylar) part", 0.076 * ADDUCTOR_MAGNUS_POSTERIOR_FRACTION, 0.144,
        _adductor_magnus_hip_arm, _const(0.0),
        "volume share: Handsfield et al. 2014 [M], half of it posterior (assumption); fibre length: Ward et al. "
        "2009 [M]; hip-extension arm [M] (Nemeth & Ohlsen 1985); no knee moment",
    ),
    "gas": OtherMuscle(
        "gas", "gastrocnemius (medial + lateral)", 0.036 + 0.020, 0.055, _const(0.0), _gastrocnemius_knee_arm,
        "volume share: Handsfield et al. 2014 [M]; fibre length: Ward et al. 2009 [M]; knee arm [M]; its ankle "
        "moment is not matched; an ankle-crossing muscle, not larger in sprinters (Handsfield et al. 2017 [V])",
        sprinter_volume_ratio=1.0,
    ),
}

#: Reserve (unmet) moment that still counts as met: 1 N m + 1 % of the net moment (assumption, common practice:
#: reserve actuators small against the net joint moment).
RESERVE_TOLERANCE_NM = 1.0
RESERVE_TOLERANCE_FRACTION = 0.01


@dataclass(frozen=True)
class OtherMuscleKinematics:
    """Sagittal moment arms [F,2] (hip flexion, knee flexion) and musculotendon velocity [F] of a non-hamstring."""

    code: str
    moment_arms_m: np.ndarray
    velocity_m_per_s: np.ndarray
    max_isometric_force_n: float


def other_muscle_kinematics(
    hip_flexion_rad: np.ndarray,
    knee_flexion_rad: np.ndarray,
    rate_hz: float,
    limb_force_scale_n_m: float = float("nan"),
    muscles: Mapping[str, OtherMuscle] = OTHER_MUSCLES,
) -> dict[str, OtherMuscleKinematics]:
    """Moment arms and lengthening velocity v = -(r_hip dhip/dt + r_knee dknee/dt) of the non-hamstring muscles.

    ``limb_force_scale_n_m``: limb muscle volume x specific tension x strength factor (N m), see
    ``athlete_force_scale``; each muscle's maximum force is that x its volume share / its optimal fibre length.
    """
    hip = np.asarray(hip_flexion_rad, dtype=float)
    knee = np.asarray(knee_flexion_rad, dtype=float)
    arms, velocity = _other_arms_and_velocities(hip, knee, *_angle_rates(hip, knee, rate_hz), muscles)
    return {code: OtherMuscleKinematics(code, arms[:, k], velocity[:, k],
                                        limb_force_scale_n_m * m.volume_ratio_share / m.optimal_fibre_length_m)
            for k, (code, m) in enumerate(muscles.items())}


def _angle_rates(hip: np.ndarray, knee: np.ndarray, rate_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """Hip and knee flexion rates exactly as the muscles stage takes them (np.gradient), so all muscles share one
    joint velocity."""
    return tuple(np.gradient(a, 1.0 / rate_hz) if a.size > 1 else np.zeros_like(a) for a in (hip, knee))


def _other_arms_and_velocities(hip, knee, hip_rate, knee_rate, muscles: Mapping[str, OtherMuscle] = OTHER_MUSCLES):
    """Sagittal moment arms [F, m, 2] and velocities v = -(r_hip dhip/dt + r_knee dknee/dt) [F, m] of ``muscles``."""
    if not muscles:
        return np.zeros((hip.size, 0, 2)), np.zeros((hip.size, 0))
    arms = np.stack([np.stack([m.hip_moment_arm(hip), m.knee_moment_arm(knee)], axis=1) for m in muscles.values()],
                    axis=1)
    return arms, -(arms[:, :, 0] * hip_rate[:, None] + arms[:, :, 1] * knee_rate[:, None])


def athlete_force_scale(states: Mapping[str, MuscleState]) -> float:
    """Limb muscle volume x specific tension x strength factor (N m) behind the states' maximum forces: the
    muscles stage's F0 = share x volume / l_opt x tension x cos(pennation) x factor, solved for the product (the
    same for every hamstring), so the other muscles are scaled exactly alike. NaN without forces (no body mass)."""
    for m, st in states.items():
        f0 = float(st.max_isometric_force_n)
        if m in mus.ARCHITECTURE and np.isfinite(f0) and f0 > 0:
            arch = mus.ARCHITECTURE[m]
            return f0 * arch.optimal_fibre_length_m / (mus.VOLUME_SHARE[m] * mus.SPRINTER_VOLUME_RATIO
                                                       * np.cos(arch.pennation_rad))
    return float("nan")


@dataclass(frozen=True)
class ForceSharing:
    """Result of sharing the swing moments among the muscles: forces (N), velocities (m/s), frames not met.

    ``demand_nm`` [F, 2]: the net hip and knee flexion moments (inverse dynamics); ``reserve_nm`` [F, 2]: the part
    of them the muscles could not carry (demand - carried; 0 where met). ``hip_extension_unmet`` and
    ``knee_flexion_unmet`` [F]: frames whose hip *extension* or knee *flexion* demand (what the hamstrings act
    against) is short by more than ``RESERVE_TOLERANCE_NM`` + ``RESERVE_TOLERANCE_FRACTION`` of it.
    """

    force_n: dict[str, np.ndarray]
    velocity_m_per_s: dict[str, np.ndarray]
    moment_arms_m: dict[str, np.ndarray]  # [F,2] hip flexion, knee flexion
    unmet: np.ndarray  # swing frames where no admissible activations reproduce the moments (share_forces tolerance)
    valid: np.ndarray  # swing frames with finite moments
    demand_nm: np.ndarray | None = None
    reserve_nm: np.ndarray | None = None
    hip_extension_unmet: np.ndarray | None = None
    knee_flexion_unmet: np.ndarray | None = None
    fibre_length_lopt: dict[str, np.ndarray] | None = None  # hamstrings' fibre length at their own force (l_opt)
    dual: np.ndarray | None = None  # [F, 2] the solve's multipliers (a warm start for the Monte Carlo band)

    @property
    def hamstring_demand_unmet(self) -> np.ndarray:
        """Frames where the hip-extension or knee-flexion demand (the hamstrings' share) is not met."""
        return self.hip_extension_unmet | self.knee_flexion_unmet

    @property
    def carried_moments_nm(self) -> np.ndarray:
        """Sagittal moments [F,2] (hip flexion, knee flexion) the muscles actually carry: sum_m r_m F_m.

        Equal to the inverse-dynamics moments on met frames; on unmet frames, the regularised closest ones.
        """
        return sum(self.moment_arms_m[m] * self.force_n[m][:, None] for m in self.force_n)


def share_swing_moments(
    moments: JointMoments,
    states: Mapping[str, MuscleState],
    angles: Mapping[str, np.ndarray],
    rate_hz: float,
    strength_scale: float = 1.0,
    include_passive: bool = True,
) -> ForceSharing:
    """Muscle forces that reproduce the net sagittal hip and knee moments with minimum squared activation.

    Hamstrings: capacity = F0 fl(l) fv(v) from the muscles stage's fibre length and velocity, plus the passive
    force F0 fp(l) that acts whatever the activation (De Groote et al. 2016 curves). Other muscles: F0 fv(v) with v
    from their moment arms and a rigid tendon (their length-force relation is not modelled: set to 1), no passive
    force. ``angles`` are the joint angles in rad as given to ``muscles.muscle_states`` (keys ``hip_flexion``,
    ``knee_flexion``). Maximum forces: the states' (hamstrings, from the athlete's muscle volume) and the same
    volume scaling for the others (``athlete_force_scale``), all multiplied by ``strength_scale`` (default 1).
    """
    return share_swing_moments_of_legs([(moments, states, angles, rate_hz)], strength_scale, include_passive)[0]


def share_swing_moments_of_legs(
    legs: Sequence[tuple[JointMoments, Mapping[str, MuscleState], Mapping[str, np.ndarray], float]],
    strength_scale: float = 1.0,
    include_passive: bool = True,
) -> list[ForceSharing]:
    """``share_swing_moments`` for several legs, each (moments, states, angles, rate), with one solve: the problem
    is separate for every frame, so stacking the legs' frames gives the same forces in fewer solver steps."""
    if len({tuple(states) for _, states, _, _ in legs}) > 1:
        raise HamstrideError("legs shared together must have the same muscles", code="config")
    p = _sharing_problem(legs, strength_scale, include_passive)
    solved = _solve_sharing(p)
    n_h = p.lopt_alpha.shape[1]
    fed = solved[0][:, :n_h]
    for _ in range(TENDON_PASSES - 1):  # compliant tendons: fibre lengths from the forces, then solve again
        p = _with_fibres(p, *_compliant_fibres(p, fed), include_passive)
        solved = _solve_sharing(p)
        fed = 0.5 * (fed + solved[0][:, :n_h])
    force, met, reserve, hip_short, knee_short, dual = solved
    fibre_lopt = _compliant_fibres(p, force[:, :n_h])[0]
    unmet = p.valid & ~met
    out = []
    for start, stop in zip(p.leg_starts[:-1], p.leg_starts[1:]):
        out.append(ForceSharing(
            force_n={c: force[start:stop, i] for i, c in enumerate(p.names)},
            velocity_m_per_s={c: p.velocities[start:stop, i] for i, c in enumerate(p.names)},
            moment_arms_m={c: p.arms[start:stop, i] for i, c in enumerate(p.names)},
            unmet=unmet[start:stop],
            valid=p.valid[start:stop],
            demand_nm=p.demand[start:stop], reserve_nm=reserve[start:stop],
            hip_extension_unmet=hip_short[start:stop], knee_flexion_unmet=knee_short[start:stop],
            fibre_length_lopt={c: fibre_lopt[start:stop, i] for i, c in enumerate(p.names[:n_h])},
            dual=dual[start:stop],
        ))
    return out


class _SharingProblem(NamedTuple):
    """The legs' sharing problem, frames of the legs one after the other (see ``_sharing_problem``)."""

    names: list[str]
    arms: np.ndarray  # [F, m, 2] hip flexion, knee flexion
    capacity: np.ndarray  # [F, m] active force capacity (N)
    passive: np.ndarray  # [F, m] passive force (N)
    target: np.ndarray  # [F, 2] moments left for the active forces (N m)
    velocities: np.ndarray  # [F, m] musculotendon lengthening velocity (m/s)
    valid: np.ndarray  # [F]
    leg_starts: list[int]  # first frame of each leg, then the total
    demand: np.ndarray  # [F, 2] net hip and knee flexion moments (N m)
    fmax: np.ndarray  # [F, m] maximum isometric forces (N)
    v_norm: np.ndarray  # [F, m] fibre velocities (l_opt/s) the capacities were taken at
    mtu_length: np.ndarray  # [F, h] hamstring musculotendon lengths (m)
    slack: np.ndarray  # [F, h] hamstring tendon slack lengths (m)
    lopt_alpha: np.ndarray  # [2, h] hamstring optimal fibre length (m) and pennation at optimal length (rad)
    rate_hz: float


def _solve_sharing(p: _SharingProblem, initial_dual: np.ndarray | None = None):
    """Forces [F, m] (active + passive, NaN off the valid frames), met [F] (both joints within ``share_forces``
    tolerance), reserve [F, 2] (demand - carried) and the hip-extension / knee-flexion shortfalls [F]."""
    active, met, dual = share_forces(p.arms, p.capacity, p.target, initial_dual=initial_dual, return_dual=True)
    force = active + p.passive
    force[~p.valid] = np.nan
    carried = np.einsum("fmj,fm->fj", p.arms, np.nan_to_num(force))
    reserve = np.where(p.valid[:, None], p.demand - carried, np.nan)
    tolerance = RESERVE_TOLERANCE_NM + RESERVE_TOLERANCE_FRACTION * np.abs(p.demand)
    with np.errstate(invalid="ignore"):
        hip_short = p.valid & (p.demand[:, 0] < 0) & (reserve[:, 0] < -tolerance[:, 0])  # extension not reached
        knee_short = p.valid & (p.demand[:, 1] > 0) & (reserve[:, 1] > tolerance[:, 1])  # flexion not reached
    return force, met, reserve, hip_short, knee_short, dual


def sharing_capacities(fmax, l_norm_hamstrings, v_norm, include_passive=True, *,
                       max_velocity_lopt_per_s=mus.MAX_SHORTENING_VELOCITY_LOPT_PER_S):
    """Active capacity F0 fl fv [F, m] and passive force F0 fp [F, m] of the muscles of the sharing problem; the
    first ``l_norm_hamstrings.shape[1]`` muscles are the hamstrings (force-length and passive force modelled),
    the rest have fl = 1 and no passive force. Arrays broadcast over leading axes (Monte Carlo samples)."""
    n_ham = l_norm_hamstrings.shape[-1]
    length_factor = np.ones(np.broadcast_shapes(np.shape(fmax), np.shape(v_norm)))
    length_factor[..., :n_ham] = mus.active_force_length(l_norm_hamstrings)
    cap = fmax * np.clip(length_factor * mus.force_velocity(v_norm, max_velocity_lopt_per_s), 0.0, None)
    fp = np.zeros_like(cap)
    if include_passive:
        fp[..., :n_ham] = np.nan_to_num(fmax[..., :n_ham] * mus.passive_force_length(l_norm_hamstrings), nan=0.0)
    return cap, fp


def _sharing_problem(legs, strength_scale, include_passive) -> _SharingProblem:
    """The sharing problem of legs (moments, states, angles, rate) with the same muscles: the hamstrings (from the
    muscles stage) and the other muscles, with the passive forces' moments taken off the targets. Only the angle
    rates are taken leg by leg; everything else runs once over the legs' stacked frames."""
    hamstrings = list(legs[0][1])
    others = list(OTHER_MUSCLES)
    hip_knee = [(np.asarray(angles["hip_flexion"], dtype=float), np.asarray(angles["knee_flexion"], dtype=float))
                for _, _, angles, _ in legs]
    sizes = [hip.shape[0] for hip, _ in hip_knee]
    rates = [_angle_rates(hip, knee, rate_hz) for (hip, knee), (_, _, _, rate_hz) in zip(hip_knee, legs)]
    hip, knee = (np.concatenate(angle) for angle in zip(*hip_knee))  # the legs' frames one after the other
    hip_rate, knee_rate = (np.concatenate(rate) for rate in zip(*rates))
    other_arms, other_vel = _other_arms_and_velocities(hip, knee, hip_rate, knee_rate)

    def hamstring_field(get):  # [F, hamstrings] over the stacked legs
        return np.concatenate([np.stack([np.asarray(get(states[m]), dtype=float) for m in hamstrings], axis=1)
                               for _, states, _, _ in legs])

    arms = np.concatenate([np.stack([np.asarray(states[m].moment_arms_m, dtype=float)[:, [0, 3]] for m in hamstrings],
                                    axis=1) for _, states, _, _ in legs])
    r = np.concatenate([arms, other_arms], axis=1)  # [F, m, 2]
    velocities = np.concatenate([hamstring_field(lambda st: st.velocity_m_per_s), other_vel], axis=1)

    def leg_fmax(states):  # the hamstrings' from the muscles stage; the others' from the same limb volume
        scale = athlete_force_scale(states)
        return ([float(states[m].max_isometric_force_n) * strength_scale for m in hamstrings]
                + [scale * OTHER_MUSCLES[c].volume_ratio_share / OTHER_MUSCLES[c].optimal_fibre_length_m
                   * strength_scale for c in others])

    # maximum forces per frame (each leg's own scaling), then capacities of all muscles at once: [F, muscles]
    fmax = np.repeat([leg_fmax(states) for _, states, _, _ in legs], sizes, axis=0)
    l_norm = hamstring_field(lambda st: st.fibre_length_lopt)
    v_norm = np.concatenate([hamstring_field(lambda st: st.velocity_lopt_per_s),
                             other_vel / np.array([OTHER_MUSCLES[c].optimal_fibre_length_m for c in others])], axis=1)
    cap, fp = sharing_capacities(fmax, l_norm, v_norm, include_passive)
    demand = np.concatenate([np.stack([m.hip_flexion_nm, m.knee_flexion_nm], axis=1) for m, _, _, _ in legs])
    target = demand - np.einsum("fmj,fm->fj", r, fp)
    valid = (np.concatenate([np.asarray(m.valid, dtype=bool) for m, _, _, _ in legs]) & np.isfinite(target).all(axis=1)
             & np.isfinite(fmax).all(axis=1))
    lopt_alpha = np.array([[states_lopt(legs[0][1][m]) for m in hamstrings],
                           [mus.ARCHITECTURE[m].pennation_rad if m in mus.ARCHITECTURE else 0.0 for m in hamstrings]])
    return _SharingProblem([*hamstrings, *others], r, cap, fp, target, velocities, valid,
                           [0, *np.cumsum(sizes).tolist()], demand, fmax, v_norm,
                           hamstring_field(lambda st: st.length_m),
                           hamstring_field(lambda st: np.full(np.shape(st.length_m), st.tendon_slack_length_m)),
                           lopt_alpha, float(legs[0][3]))


def states_lopt(state: MuscleState) -> float:
    """A state's optimal fibre length (the architecture's when the state does not carry one)."""
    l_opt = float(state.optimal_fibre_length_m)
    return l_opt if l_opt > 0 else mus.ARCHITECTURE[state.muscle].optimal_fibre_length_m


#: Passes of the compliant-tendon correction in the sharing problem: the first solve takes the muscles stage's fibre
#: lengths (tendon at its F0 stretch); each further pass recomputes every hamstring's fibre length and velocity with
#: the tendon stretched by the force of the previous pass (De Groote et al. 2016 tendon curve) and solves again,
#: the force fed back as the mean of the last two solves (damping, assumption). On a generated 9 m/s sprint, four
#: passes give peak forces within 0.2 %, negative work within 0.5 % and the same coverage as twenty (measured).
TENDON_PASSES = 4


def _compliant_fibres(p: _SharingProblem, force_h: np.ndarray, strain_scale=1.0, mtu_velocity_h=None):
    """Hamstring fibre length (l_opt) and fibre velocity (l_opt/s) [F, h] with each tendon stretched by its force
    ``force_h`` [F, h] (N; NaN = no force). The fibre velocity is the musculotendon velocity along the fibres
    (``v cos(alpha) / l_opt`` at the loaded pennation): the tendon's own stretch rate is left out, because
    frame-by-frame static optimisation forces are not smooth enough to differentiate (it made the passes
    oscillate)."""
    l_opt, alpha = p.lopt_alpha
    n_h = l_opt.size
    f_norm = np.nan_to_num(force_h / p.fmax[:, :n_h], nan=0.0)
    fibre, pennation = mus.fibre_length(p.mtu_length, p.slack, l_opt, alpha, f_norm, strain_scale)
    velocity = p.velocities[:, :n_h] if mtu_velocity_h is None else mtu_velocity_h
    return fibre / l_opt, velocity * np.cos(pennation) / l_opt


def _with_fibres(p: _SharingProblem, l_norm_h: np.ndarray, v_norm_h: np.ndarray, include_passive: bool = True):
    """The sharing problem with other hamstring fibre lengths and velocities (capacities, passive forces, targets)."""
    n_h = l_norm_h.shape[1]
    v_norm = p.v_norm.copy()
    v_norm[:, :n_h] = v_norm_h
    cap, fp = sharing_capacities(p.fmax, l_norm_h, v_norm, include_passive)
    target = p.demand - np.einsum("fmj,fm->fj", p.arms, fp)
    return p._replace(capacity=cap, passive=fp, target=target, v_norm=v_norm)


# --------------------------------------------------------------------------- power and work
def negative_positive_work(
    force_n: np.ndarray, velocity_m_per_s: np.ndarray, rate_hz: float, start: int, stop: int
) -> tuple[float, float]:
    """Work absorbed (lengthening under force) and produced (shortening) between frames start..stop-1 (J, both >= 0).

    Absorbed = integral of F v over the frames where F v > 0 (v = dL/dt lengthening positive); produced = integral
    of -F v where F v < 0 (trapezoidal rule). NaN when any force in the window is NaN (e.g. no body mass).
    """
    f = np.asarray(force_n, dtype=float)[start:stop]
    v = np.asarray(velocity_m_per_s, dtype=float)[start:stop]
    if f.size < 2 or not (np.isfinite(f).all() and np.isfinite(v).all()):
        return float("nan"), float("nan")
    absorbed_rate = f * v
    dt = 1.0 / rate_hz
    negative = float(np.trapezoid(np.clip(absorbed_rate, 0.0, None), dx=dt))
    positive = float(np.trapezoid(np.clip(-absorbed_rate, 0.0, None), dx=dt))
    return negative, positive


def window_work(force_n: np.ndarray, velocity_m_per_s: np.ndarray, rate_hz: float, starts, stops
                ) -> tuple[np.ndarray, np.ndarray]:
    """``negative_positive_work`` for many windows of frames ``start..stop-1`` at once, on every column of [F] or
    [F, C] force and velocity: (absorbed, produced) each [W] or [W, C], trapezoidal rule, NaN where a window has
    fewer than two frames or a non-finite force or velocity."""
    from .strides import window_frames

    f = np.asarray(force_n, dtype=float)
    v = np.asarray(velocity_m_per_s, dtype=float)
    rate = f * v
    flat = rate.reshape(len(rate), -1)
    frames, inside = window_frames(starts, stops, len(rate))
    windows = np.where(inside[:, :, None], flat[frames], 0.0)  # [W, L, C]
    n_inside = inside.sum(axis=1)
    # trapezoid weights: dt inside, dt / 2 at both ends of each window
    weight = inside.astype(float)
    if weight.shape[1]:
        weight[:, 0] *= 0.5
        weight[np.arange(len(weight)), np.clip(n_inside - 1, 0, None)] *= 0.5
    ok = np.isfinite(windows).all(axis=1) & (n_inside >= 2)[:, None]
    dt = 1.0 / rate_hz
    absorbed = np.einsum("wl,wlc->wc", weight, np.clip(np.nan_to_num(windows), 0.0, None)) * dt
    produced = np.einsum("wl,wlc->wc", weight, np.clip(-np.nan_to_num(windows), 0.0, None)) * dt
    shape = (len(weight),) + rate.shape[1:]
    return (np.where(ok, absorbed, np.nan).reshape(shape), np.where(ok, produced, np.nan).reshape(shape))


@dataclass(frozen=True)
class MuscleDynamics:
    """Force, velocity and power of one muscle over a trial; power delivered = -F v (W, negative while absorbing)."""

    muscle: str
    force_n: np.ndarray
    velocity_m_per_s: np.ndarray
    power_w: np.ndarray
    rate_hz: float

    def work_over(self, start: int, stop: int) -> tuple[float, float]:
        """(negative_work_j, positive_work_j) over frames start..stop-1, both reported positive."""
        return negative_positive_work(self.force_n, self.velocity_m_per_s, self.rate_hz, start, stop)

    def peak_force(self, start: int, stop: int) -> tuple[float, int]:
        """Peak force (N) in the window and its frame index; NaN, -1 when there is no force."""
        f = np.asarray(self.force_n, dtype=float)[start:stop]
        if f.size == 0 or not np.isfinite(f).any():
            return float("nan"), -1
        i = int(np.nanargmax(f))
        return float(f[i]), start + i


def muscle_dynamics(sharing: ForceSharing, rate_hz: float) -> dict[str, MuscleDynamics]:
    """Per-muscle force, velocity and delivered power (-F v) from a force-sharing result."""
    return {
        m: MuscleDynamics(m, f, sharing.velocity_m_per_s[m], -f * sharing.velocity_m_per_s[m], float(rate_hz))
        for m, f in sharing.force_n.items()
    }


# --------------------------------------------------------------------------- uncertainty band of force and work
#: Samples of the force and work band: each is a full sharing solve over the swing frames, so fewer than the
#: strain band's 200 (the 5th/95th percentiles of 20 samples are the 2nd and 19th values; assumption, to keep a
#: trial's analysis within its time budget).
FORCE_BAND_SAMPLES = 20
#: The band's samples are solved on every k-th frame, k = rate // this (250 Hz: every 2nd, 500 Hz: every 4th),
#: which halves its cost or better. Against every frame (generated 9 m/s sprint at 250 Hz): the percentiles of
#: peak force move by up to 5 % of the band's width, those of negative work by up to 11 % (the power peaks are
#: sharp); both well inside the sampling error of 5th/95th percentiles from 20 samples. The frames between kept
#: ones next to each stride's nominal peak force are solved too (peaks only): without them a sample's sharp peak
#: between kept frames moved the force percentiles by up to 18-20 % of the width on the spike-free generator's
#: sprint; with them 4.4 % (work 10 %).
BAND_MIN_RATE_HZ = 100.0


class BandLeg(NamedTuple):
    """One leg's input to ``force_work_band``: moments, angles (the four of ``muscles.ANGLE_NAMES``), muscle
    dimensions, and its stride windows (swing start, stride end) per stride."""

    moments: JointMoments
    angles: Mapping[str, np.ndarray]
    dims: object  # muscles.MuscleDims
    starts: np.ndarray
    stops: np.ndarray
    force_norm: Mapping[str, np.ndarray] | None = None  # nominal force / F0 per hamstring [F] (tendon stretch)
    dual: np.ndarray | None = None  # [F, 2] nominal solve's multipliers: warm start of every sample's solve


def force_work_band(legs: Sequence[BandLeg], rate_hz: float, *, body_mass_kg: float, height_m: float,
                    strength_factor: float = 1.0, n_samples: int = FORCE_BAND_SAMPLES, seed: int = 1,
                    q=(5, 95)) -> list[dict[str, np.ndarray]]:
    """5th/95th percentiles of each stride's peak hamstring force and negative work over Monte Carlo samples.

    Each sample draws: the muscle paths, hip-centre error (Harrington et al. 2007), l_opt and pennation (Ward et
    al. 2009 SDs) and the slack rule's reference strain (``muscles.monte_carlo_states``); the specific tension
    (one draw for all muscles, CV ``SPECIFIC_TENSION_CV``) and each muscle's volume (CV ``VOLUME_PREDICTION_CV``,
    lognormal); the maximum shortening velocity (10 +- 2 l_opt/s, clipped to 6-14); the tendon compliance (strain
    at a given force x lognormal, CV ``TENDON_STRAIN_CV``), each tendon stretched by the nominal solution's force
    fraction ``leg.force_norm``. The moments are the nominal ones. All samples' frames are solved in one
    ``share_forces`` call (one pass: the nominal force fractions stand for the samples' own), warm-started from
    the nominal multipliers ``leg.dual``, on every k-th frame (``BAND_MIN_RATE_HZ``). Returns per leg
    {"peak_force_n": [2, strides, hamstrings], "negative_work_j": [2, strides, hamstrings]}.
    """
    from .metrics import window_peaks

    rng = np.random.default_rng(seed)
    hamstrings = list(mus.MUSCLES)
    others = list(OTHER_MUSCLES)
    n_h, n_o = len(hamstrings), len(others)
    tension = mus.SPECIFIC_TENSION_PA * np.exp(mus.SPECIFIC_TENSION_CV * rng.standard_normal(n_samples)
                                               - 0.5 * mus.SPECIFIC_TENSION_CV ** 2)
    volume = np.exp(mus.VOLUME_PREDICTION_CV * rng.standard_normal((n_samples, n_h + n_o))
                    - 0.5 * mus.VOLUME_PREDICTION_CV ** 2)
    v_max = np.clip(mus.MAX_SHORTENING_VELOCITY_LOPT_PER_S
                    + mus.MAX_SHORTENING_VELOCITY_SD * rng.standard_normal(n_samples), 6.0, 14.0)
    tendon_scale = np.exp(mus.TENDON_STRAIN_CV * rng.standard_normal((n_samples, 1)) - 0.5 * mus.TENDON_STRAIN_CV ** 2)
    limb = mus.limb_muscle_volume_m3(body_mass_kg, height_m) * strength_factor
    blocks, per_leg = [], []
    for leg in legs:
        valid = np.asarray(leg.moments.valid, dtype=bool)
        step = max(1, int(rate_hz // BAND_MIN_RATE_HZ))  # every step-th frame (see BAND_MIN_RATE_HZ)
        kept = np.arange(0, valid.size, step)
        # only the kept frames some stride's window reads (peaks [first, stop // step], work up to the same):
        # swings outside the valid strides (e.g. cut by the trial's ends) are not solved
        starts, stops = np.asarray(leg.starts, dtype=int), np.asarray(leg.stops, dtype=int)
        read = np.zeros(kept.size + 1, dtype=int)
        np.add.at(read, np.clip(-(-starts // step), 0, kept.size), 1)
        np.add.at(read, np.clip(stops // step + 1, 0, kept.size), -1)
        frames = kept[valid[kept] & (np.cumsum(read[:-1]) > 0)]
        # and the frames between the kept ones next to each stride's nominal peak force (every hamstring): a
        # sample's peak there would fall between kept frames (peaks only; work stays on the kept frames)
        extra = np.empty(0, dtype=int)
        if step > 1 and leg.force_norm is not None and len(starts):
            nominal = np.stack([np.asarray(leg.force_norm[m], dtype=float) for m in hamstrings], axis=1)
            at_peak = window_peaks(nominal, starts, stops)[1]
            near = (at_peak[at_peak >= 0][:, None] + np.arange(1 - step, step)).ravel()
            near = near[(near >= 0) & (near < valid.size)]
            extra = np.setdiff1d(near[valid[near]], frames)
        solved = np.concatenate([frames, extra])
        # the samples' states on the solved frames only: [S, Fv]
        sampled = mus.monte_carlo_states(leg.angles, leg.dims, rate_hz, n_samples, seed=0,
                                         tendon_force_norm=leg.force_norm, tendon_strain_scale=tendon_scale,
                                         frames=solved)
        col = slice(None)
        hip, knee = (np.asarray(leg.angles[k], dtype=float) for k in ("hip_flexion", "knee_flexion"))
        o_arms, o_vel = _other_arms_and_velocities(hip, knee, *_angle_rates(hip, knee, rate_hz))
        h_arms = np.stack([sampled[m].moment_arms_m[:, col] for m in hamstrings], axis=2)  # [S, Fv, h, 2]
        arms = np.concatenate([h_arms, np.broadcast_to(o_arms[solved], (n_samples, solved.size, n_o, 2))], axis=2)
        l_norm = np.stack([sampled[m].fibre_length_lopt[:, col] for m in hamstrings], axis=2)
        o_lopt = np.array([OTHER_MUSCLES[c].optimal_fibre_length_m for c in others])
        v_norm = np.concatenate([np.stack([sampled[m].velocity_lopt_per_s[:, col] for m in hamstrings], axis=2),
                                 np.broadcast_to(o_vel[solved] / o_lopt, (n_samples, solved.size, n_o))], axis=2)
        f0_h = np.stack([mus.max_isometric_force(m, body_mass_kg=body_mass_kg, height_m=height_m,
                                                 strength_factor=strength_factor,
                                                 volume_share=mus.VOLUME_SHARE[m] * volume[:, k],
                                                 optimal_fibre_length_m=sampled[m].optimal_fibre_length_m[:, 0],
                                                 pennation_rad=sampled[m].pennation_rad[:, 0],
                                                 specific_tension_pa=tension) for k, m in enumerate(hamstrings)],
                        axis=1)  # [S, h]
        f0_o = (limb * tension[:, None] * volume[:, n_h:]
                * np.array([OTHER_MUSCLES[c].volume_ratio_share for c in others]) / o_lopt)  # [S, o]
        fmax = np.concatenate([f0_h, f0_o], axis=1)[:, None, :]  # [S, 1, m]
        cap, fp = sharing_capacities(fmax, l_norm, v_norm, max_velocity_lopt_per_s=v_max[:, None, None])
        demand = np.stack([leg.moments.hip_flexion_nm, leg.moments.knee_flexion_nm], axis=1)[solved]
        target = demand[None] - np.einsum("sfmj,sfm->sfj", arms, fp)
        warm = (np.full((n_samples * frames.size, 2), np.nan) if leg.dual is None else
                np.broadcast_to(np.asarray(leg.dual, dtype=float)[solved], (n_samples, solved.size, 2)).reshape(-1, 2))
        blocks.append((arms.reshape(-1, n_h + n_o, 2), cap.reshape(-1, n_h + n_o), target.reshape(-1, 2), warm))
        per_leg.append((sampled, frames, extra, fp[..., :n_h], kept, step))
    if not blocks:
        return []
    arms_all, cap_all, target_all, warm_all = (np.concatenate(b) for b in zip(*blocks))
    active, _ = share_forces(arms_all, cap_all, target_all, initial_dual=warm_all)
    out, at = [], 0
    for leg, (sampled, frames, extra, fp, kept, step) in zip(legs, per_leg):
        n_solved = frames.size + extra.size
        n = n_samples * n_solved
        force_all = (active[at:at + n, :n_h].reshape(n_samples, n_solved, n_h) + fp).transpose(1, 0, 2)
        at += n
        force = np.full((kept.size, n_samples * n_h), np.nan)  # kept frames x (sample, muscle)
        force[frames // step] = force_all[:frames.size].reshape(frames.size, -1)
        velocity = np.zeros((kept.size, n_samples * n_h))  # (no force, no work off the solved frames)
        velocity[frames // step] = np.stack([sampled[m].velocity_m_per_s[:, :frames.size] for m in hamstrings],
                                            axis=2).transpose(1, 0, 2).reshape(frames.size, -1)
        starts, stops = np.asarray(leg.starts, dtype=int), np.asarray(leg.stops, dtype=int)
        first = -(-starts // step)  # the windows on the kept frames: peaks [start, stop], work [start, stop)
        peaks, _ = window_peaks(force, first, stops // step)
        if extra.size:  # the frames next to the nominal peaks: [W, extra, S*h], a window's own ones only
            inside = (extra >= starts[:, None]) & (extra <= stops[:, None])
            near = np.where(inside[:, :, None], force_all[frames.size:].reshape(extra.size, -1)[None], -np.inf)
            peaks = np.where(inside.any(axis=1)[:, None], np.fmax(peaks, near.max(axis=1)), peaks)
        absorbed, _ = window_work(np.nan_to_num(force), velocity, rate_hz / step, first, (stops - 1) // step + 1)
        shape = (len(starts), n_samples, n_h)
        out.append({"peak_force_n": _sample_percentiles(peaks.reshape(shape), q),
                    "negative_work_j": _sample_percentiles(absorbed.reshape(shape), q)})
    return out


def _sample_percentiles(values: np.ndarray, q) -> np.ndarray:
    """``np.nanpercentile(values, q, axis=1)`` of [W, S, h]: numpy's plain percentile when no value is NaN (faster),
    its NaN-skipping version otherwise (the same numbers either way)."""
    if np.isnan(values).any():
        return np.nanpercentile(values, q, axis=1)
    return np.percentile(values, q, axis=1)
