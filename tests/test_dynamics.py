"""Tests of swing-phase inverse dynamics, force sharing, power and work.

References: de Leva 1996 (J Biomech 29:1223) Table 4 for the inertia table; physics (forward simulations with
scipy.integrate.solve_ivp and the work-energy theorem) for inverse dynamics; scipy.optimize.minimize (SLSQP) for the
static optimisation; closed-form integrals for work.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import lsq_linear, minimize
from scipy.spatial.transform import Rotation

from hamstride import dynamics as dyn
from hamstride.segments import Frames, frames_from_x_y, frames_from_y_z
from hamstride.signal import lowpass, residual_cutoff

from _generated_demand import generated_swing_moments  # tests/_generated_demand.py: demand, not truth

# --------------------------------------------------------------------------- de Leva table, cell by cell
# de Leva P. 1996, J Biomech 29:1223-1230, Table 4 (as transcribed in references.md, status [V]):
# mass fraction, CoM from the proximal endpoint, r_sagittal, r_transverse, r_longitudinal.
DE_LEVA_TABLE_4 = [
    ("thigh", "male", 0.1416, 0.4095, 0.329, 0.329, 0.149),
    ("thigh", "female", 0.1478, 0.3612, 0.369, 0.364, 0.162),
    ("shank", "male", 0.0433, 0.4459, 0.255, 0.249, 0.103),
    ("shank", "female", 0.0481, 0.4416, 0.271, 0.267, 0.093),
    ("foot", "male", 0.0137, 0.4415, 0.257, 0.245, 0.124),
    ("foot", "female", 0.0129, 0.4014, 0.299, 0.279, 0.139),
]


@pytest.mark.parametrize("segment,sex,mass,com,r_sag,r_trans,r_long", DE_LEVA_TABLE_4)
def test_de_leva_table_cell_by_cell(segment, sex, mass, com, r_sag, r_trans, r_long):
    p = dyn.DE_LEVA_1996[(segment, sex)]
    assert p.mass_fraction == mass
    assert p.com_fraction == com
    assert p.r_sagittal == r_sag
    assert p.r_transverse == r_trans
    assert p.r_longitudinal == r_long


def test_de_leva_table_has_exactly_the_leg_rows():
    assert set(dyn.DE_LEVA_1996) == {(s, x) for s, x, *_ in DE_LEVA_TABLE_4}


def test_leg_inertia_scales_mass_and_radii():
    # m = fraction * body mass, I = m (r L)^2 (de Leva 1996; radius-of-gyration definition)
    inertia = dyn.leg_inertia(80.0, "F", 0.40, 0.41, 0.24)
    thigh, foot = inertia["thigh"], inertia["foot"]
    assert thigh.mass_kg == pytest.approx(0.1478 * 80.0)
    assert thigh.inertia_local[2, 2] == pytest.approx(0.1478 * 80 * (0.364 * 0.40) ** 2)  # medio-lateral: transverse
    assert thigh.inertia_local[1, 1] == pytest.approx(0.1478 * 80 * (0.162 * 0.40) ** 2)  # long axis Y
    assert foot.inertia_local[0, 0] == pytest.approx(0.0129 * 80 * (0.139 * 0.24) ** 2)  # foot long axis X
    assert foot.com_fraction == 0.4014
    assert dyn.leg_inertia(80.0, None, 0.4, 0.4, 0.25)["shank"].mass_kg == pytest.approx(0.0433 * 80)


@pytest.mark.parametrize("mass", [None, float("nan"), 0.0])
def test_missing_body_mass_is_explained(mass):
    with pytest.raises(dyn.BodyMassMissing, match="body mass"):
        dyn.leg_inertia(mass, "male", 0.4, 0.4, 0.25)


# --------------------------------------------------------------------------- planar swing simulation
BODY_MASS = 75.0
L_THIGH, L_SHANK, L_FOOT = 0.42, 0.43, 0.26
HEEL_IN_FOOT = np.array([-0.05, -0.06])  # heel relative to the ankle centre in foot axes (X, Y), m
INERTIA = dyn.leg_inertia(BODY_MASS, "male", L_THIGH, L_SHANK, L_FOOT)
T_SWING, HIP_SPEED = 0.36, 8.0
P90 = np.array([[0.0, -1.0], [1.0, 0.0]])
Y_PLANE = -0.1  # the right leg swings in the plane y = -0.1 m; lateral is -y on the right


def _rot2(phi):
    c, s = np.cos(phi), np.sin(phi)
    return np.array([[c, -s], [s, c]])


def _hip_path(t):
    w = 2 * np.pi / T_SWING
    pos = np.stack([HIP_SPEED * t, 0.95 + 0.03 * np.sin(w * t)], axis=-1)
    acc = np.stack([0.0 * t, -0.03 * w**2 * np.sin(w * t)], axis=-1)
    return pos, acc


def _chain():
    """Local vectors s[i][j] so that CoM_i = hip + sum_j Rot(phi_j) s[i][j] (absolute segment angles)."""
    c1, c2, c3 = (INERTIA[s].com_fraction for s in dyn.SEGMENTS)
    z = np.zeros(2)
    return [
        [np.array([0.0, -c1 * L_THIGH]), z, z],
        [np.array([0.0, -L_THIGH]), np.array([0.0, -c2 * L_SHANK]), z],
        [np.array([0.0, -L_THIGH]), np.array([0.0, -L_SHANK]), HEEL_IN_FOOT + np.array([c3 * L_FOOT, 0.0])],
    ]


CHAIN = _chain()
MASSES = np.array([INERTIA[s].mass_kg for s in dyn.SEGMENTS])
I_ZZ = np.array([INERTIA[s].inertia_local[2, 2] for s in dyn.SEGMENTS])  # about the medio-lateral axis
G2 = np.array([0.0, -9.81])


def _applied_torques(t, q, qd):
    """Known joint torques (N m, positive = increasing absolute angle of the distal segment, i.e. about +Z).

    A proportional-derivative drive toward a swing-like path (hip flexion -20 -> 70 deg, knee flexion up to
    about 100 deg) and a spring-damper ankle; only their values along the solution matter to the test.
    """
    u = np.clip(t / T_SWING, 0.0, 1.0)
    hip_goal = -0.35 + 1.55 * 0.5 * (1 - np.cos(np.pi * u))
    knee_goal = 0.5 + 1.7 * np.sin(np.pi * u) ** 1.5 * (1 - 0.5 * u)
    tau_hip = 400 * (hip_goal - q[0]) - 25 * qd[0]
    knee_flexion_moment = 150 * (knee_goal - (q[0] - q[1])) - 8 * (qd[0] - qd[1])
    tau_ankle = -15 * (q[2] - q[1] - 0.1) - 0.4 * (qd[2] - qd[1])
    return tau_hip, -knee_flexion_moment, tau_ankle


def _leg_rhs(t, y):
    """Three-segment planar leg with a prescribed hip path: sum_i m_i J_i^T (a_i - g) + I phi'' = Q (virtual work)."""
    q, qd = y[:3], y[3:]
    _, hip_acc = _hip_path(t)
    mass_matrix = np.diag(I_ZZ)
    bias = np.zeros(3)
    tau_h, tau_k, tau_a = _applied_torques(t, q, qd)
    generalised = np.array([tau_h - tau_k, tau_k - tau_a, tau_a])
    for i in range(3):
        jac = np.zeros((2, 3))
        centripetal = np.zeros(2)
        for j in range(3):
            r = _rot2(q[j])
            jac[:, j] = r @ P90 @ CHAIN[i][j]
            centripetal -= r @ CHAIN[i][j] * qd[j] ** 2
        mass_matrix = mass_matrix + MASSES[i] * jac.T @ jac
        bias += MASSES[i] * jac.T @ (hip_acc + centripetal - G2)
    return np.concatenate([qd, np.linalg.solve(mass_matrix, generalised - bias)])


def _simulate_swing(rate_hz, duration=0.5):
    y0 = np.array([-0.35, -0.85, -0.75, 0.0, 0.0, 0.0])
    t = np.arange(0.0, duration + 1e-12, 1.0 / rate_hz)
    sol = solve_ivp(_leg_rhs, (0.0, duration), y0, t_eval=t, rtol=1e-10, atol=1e-10, method="DOP853")
    assert sol.success
    q, qd = sol.y[:3].T, sol.y[3:].T
    tau = np.array([_applied_torques(tt, qq, vv) for tt, qq, vv in zip(t, q, qd)])
    return t, q, tau


def _planar_markers(t, q):
    def lab(p2, y=Y_PLANE):
        return np.stack([p2[:, 0], np.full(len(p2), y), p2[:, 1]], axis=-1)

    hip2, _ = _hip_path(t)
    rots = [np.moveaxis(_rot2(q[:, j]), -1, 0) for j in range(3)]
    knee2 = hip2 + rots[0] @ np.array([0.0, -L_THIGH])
    ankle2 = knee2 + rots[1] @ np.array([0.0, -L_SHANK])
    heel2 = ankle2 + rots[2] @ HEEL_IN_FOOT
    met2 = heel2 + rots[2] @ np.array([0.75 * L_FOOT, 0.0])
    return {
        "hip": lab(hip2),
        "lat_epi": lab(knee2, Y_PLANE - 0.05), "med_epi": lab(knee2, Y_PLANE + 0.05),
        "lat_mal": lab(ankle2, Y_PLANE - 0.035), "med_mal": lab(ankle2, Y_PLANE + 0.035),
        "heel": lab(heel2),
        "met5": lab(met2, Y_PLANE - 0.04), "met1": lab(met2, Y_PLANE + 0.04),
    }


def _inverse_dynamics_from_markers(m, rate_hz):
    """Frames and joint centres as the segments stage defines them (DEVELOPERS.md), then inverse dynamics."""
    knee = 0.5 * (m["lat_epi"] + m["med_epi"])
    ankle = 0.5 * (m["lat_mal"] + m["med_mal"])
    mid_met = 0.5 * (m["met1"] + m["met5"])
    toe = m["heel"] + (mid_met - m["heel"]) / 0.75
    thigh = frames_from_y_z(m["hip"], m["hip"] - knee, m["lat_epi"] - m["med_epi"])
    shank = frames_from_y_z(knee, knee - ankle, m["lat_mal"] - m["med_mal"])
    foot = frames_from_x_y(ankle, mid_met - m["heel"], shank.y)
    return dyn.swing_inverse_dynamics(thigh, shank, foot, m["hip"], knee, ankle, m["heel"], toe, rate_hz, INERTIA)


def _rms_error_pct(t, moments, tau):
    inner = (t > 0.05) & (t < 0.45)  # swing lies inside a trial: keep clear of the trial's first/last frames
    out = {}
    # hip flexion = +Z torque on the thigh; knee flexion = -Z torque on the shank; dorsiflexion = +Z on the foot
    for name, got, true in (
        ("hip", moments.hip_flexion_nm, tau[:, 0]),
        ("knee", moments.knee_flexion_nm, -tau[:, 1]),
        ("ankle", moments.ankle_dorsiflexion_nm, tau[:, 2]),
    ):
        err = got[inner] - true[inner]
        out[name] = 100 * np.sqrt(np.mean(err**2)) / np.abs(true[inner]).max()
    return out


RATE_HZ = 250.0


@pytest.fixture(scope="module")
def swing_sim():
    return _simulate_swing(RATE_HZ)


def test_inverse_dynamics_recovers_simulated_torques_noise_free(swing_sim):
    t, q, tau = swing_sim
    assert np.abs(tau[:, 0]).max() > 80 and np.abs(tau[:, 1]).max() > 30  # the swing is actually driven
    moments = _inverse_dynamics_from_markers(_planar_markers(t, q), RATE_HZ)
    err = _rms_error_pct(t, moments, tau)
    assert err["hip"] < 2.0 and err["knee"] < 2.0  # acceptance: RMS < 2 % of peak, noise-free
    assert err["ankle"] < 2.0
    assert moments.valid.all()
    assert np.abs(moments.hip[:, 1:]).max() < 1e-6 * np.abs(moments.hip[:, 0]).max()  # planar: no out-of-plane moment


@pytest.mark.parametrize("seed", [0, 1])
def test_inverse_dynamics_with_marker_noise_and_default_filter(swing_sim, seed):
    t, q, tau = swing_sim
    rng = np.random.default_rng(seed)
    noisy = {k: v + rng.normal(0.0, 0.0005, v.shape) for k, v in _planar_markers(t, q).items()}  # 0.5 mm
    stacked = np.concatenate(list(noisy.values()), axis=1)
    cutoff = residual_cutoff(stacked, RATE_HZ)  # the default: Winter's residual analysis, one cutoff for all markers
    filtered = {k: lowpass(v, RATE_HZ, cutoff) for k, v in noisy.items()}
    err = _rms_error_pct(t, _inverse_dynamics_from_markers(filtered, RATE_HZ), tau)
    assert err["hip"] < 10.0 and err["knee"] < 10.0  # acceptance: RMS < 10 % of peak with 0.5 mm noise


def test_swing_mask_blanks_stance(swing_sim):
    t, q, tau = swing_sim
    m = _planar_markers(t, q)
    knee = 0.5 * (m["lat_epi"] + m["med_epi"])
    ankle = 0.5 * (m["lat_mal"] + m["med_mal"])
    mid_met = 0.5 * (m["met1"] + m["met5"])
    thigh = frames_from_y_z(m["hip"], m["hip"] - knee, m["lat_epi"] - m["med_epi"])
    shank = frames_from_y_z(knee, knee - ankle, m["lat_mal"] - m["med_mal"])
    foot = frames_from_x_y(ankle, mid_met - m["heel"], shank.y)
    mask = dyn.swing_mask_from_events(len(t), RATE_HZ, np.array([0.1]), np.array([0.05, 0.3]))
    assert mask.sum() == round(0.2 * RATE_HZ) + 1 and mask[25] and mask[75] and not mask[24] and not mask[76]
    jm = dyn.swing_inverse_dynamics(thigh, shank, foot, m["hip"], knee, ankle, m["heel"], mid_met, RATE_HZ,
                                    INERTIA, swing_mask=mask)
    assert np.isnan(jm.knee_flexion_nm[~mask]).all() and np.isfinite(jm.knee_flexion_nm[mask]).all()
    assert (jm.valid == mask).all()


# --------------------------------------------------------------------------- 3D checks
def _skew(v):
    return np.array([[0, -v[2], v[1]], [v[2], 0, -v[0]], [-v[1], v[0], 0]])


def test_3d_foot_on_a_spherical_ankle_recovers_applied_torque():
    """A foot spinning about a fixed ankle point under a known 3D torque (Euler's equations about a fixed point,
    integrated with solve_ivp): the ankle moment from inverse dynamics is that torque, gyroscopic terms included."""
    rate = 1000.0
    foot_in = INERTIA["foot"]
    heel_local = np.array([-0.05, -0.06, 0.0])
    d = heel_local + np.array([foot_in.com_fraction * L_FOOT, 0.0, 0.0])  # ankle -> CoM, foot axes
    m = foot_in.mass_kg
    i_p = foot_in.inertia_local + m * (d @ d * np.eye(3) - np.outer(d, d))  # parallel axes to the ankle
    g = np.array([0.0, 0.0, -9.81])

    def torque_lab(t):
        return np.array([0.4 * np.sin(7 * t), 0.3 * np.cos(5 * t), 0.5 * np.sin(11 * t + 0.3)])

    def rhs(t, y):
        rmat, w = y[:9].reshape(3, 3), y[9:]
        tau_b = rmat.T @ torque_lab(t) + np.cross(d, rmat.T @ (m * g))
        w_dot = np.linalg.solve(i_p, tau_b - np.cross(w, i_p @ w))
        return np.concatenate([(rmat @ _skew(w)).ravel(), w_dot])

    y0 = np.concatenate([Rotation.from_euler("xyz", [0.3, -0.2, 0.5]).as_matrix().ravel(), [6.0, -4.0, 9.0]])
    t = np.arange(0.0, 0.4, 1.0 / rate)
    sol = solve_ivp(rhs, (0, t[-1]), y0, t_eval=t, rtol=1e-11, atol=1e-11, method="DOP853")
    rmat = Rotation.from_matrix(sol.y[:9].T.reshape(-1, 3, 3)).as_matrix()  # re-orthonormalise
    n = len(t)
    ankle = np.zeros((n, 3))
    heel = np.einsum("fij,j->fi", rmat, heel_local)
    toe = heel + rmat[:, :, 0] * L_FOOT
    still = Frames(np.zeros((n, 3)), np.broadcast_to(np.eye(3), (n, 3, 3)).copy())
    knee = np.tile([0.0, 0.0, L_SHANK], (n, 1))
    hip = knee + [0.0, 0.0, L_THIGH]
    jm = dyn.swing_inverse_dynamics(still, still, Frames(ankle, rmat), hip, knee, ankle, heel, toe, rate, INERTIA)
    truth = np.array([torque_lab(tt) for tt in t])
    inner = slice(5, -5)
    err = np.sqrt(np.mean((jm.ankle_lab[inner] - truth[inner]) ** 2, axis=0))
    assert (err < 0.01 * np.abs(truth).max(axis=0)).all()
    # gyroscopic and gravity terms are not small here, so the check would fail without them
    assert np.abs(np.cross(sol.y[9:].T, sol.y[9:].T @ i_p)).max() > 0.5 * np.abs(truth).max()


def _leg_3d_motion(rate):
    """An arbitrary smooth 3D motion of a connected thigh-shank-foot chain (rotations not confined to a plane)."""
    t = np.arange(0.0, 0.4, 1.0 / rate)
    rotvecs = [
        np.stack([0.3 * np.sin(9 * t), 0.2 * np.cos(6 * t), 1.2 * np.sin(8 * t)], axis=1),
        np.stack([0.2 * np.cos(7 * t), 0.4 * np.sin(5 * t), -1.0 + 0.9 * np.sin(10 * t)], axis=1),
        np.stack([0.3 * np.sin(12 * t), 0.2 * np.sin(4 * t), -0.8 + 0.5 * np.cos(9 * t)], axis=1),
    ]
    rmats = [Rotation.from_rotvec(v).as_matrix() for v in rotvecs]
    hip = np.stack([7.0 * t, -0.1 + 0.02 * np.sin(15 * t), 0.95 + 0.03 * np.sin(17 * t)], axis=1)
    knee = hip + rmats[0] @ np.array([0.0, -L_THIGH, 0.0])
    ankle = knee + rmats[1] @ np.array([0.0, -L_SHANK, 0.0])
    heel = ankle + rmats[2] @ np.array([-0.05, -0.06, 0.0])
    toe = heel + rmats[2] @ np.array([L_FOOT, 0.0, 0.0])
    return t, rmats, (hip, knee, ankle, heel, toe)


def test_mirrored_left_leg_gives_the_same_anatomical_moments():
    """The mirror image of a right-leg motion (y -> -y; segment Z kept pointing right) analysed as a left leg gives
    the same flexion, adduction and internal-rotation moments (sign conventions of DEVELOPERS.md)."""
    rate = 500.0
    _, rmats, points = _leg_3d_motion(rate)
    mirror = np.diag([1.0, -1.0, 1.0])
    keep_z_right = np.diag([1.0, 1.0, -1.0])
    right = dyn.swing_inverse_dynamics(*[Frames(o, r) for o, r in zip(points[:3], rmats)], *points, rate, INERTIA)
    m_points = [p @ mirror for p in points]
    m_rmats = [mirror @ r @ keep_z_right for r in rmats]
    left = dyn.swing_inverse_dynamics(*[Frames(o, r) for o, r in zip(m_points[:3], m_rmats)], *m_points, rate,
                                      INERTIA, side="left")
    for joint in ("hip", "knee", "ankle"):
        a, b = getattr(right, joint), getattr(left, joint)
        assert np.abs(a[:, 1:]).max() > 0.05 * np.abs(a).max()  # out-of-plane components are not trivially zero
        np.testing.assert_allclose(b, a, atol=1e-9 * np.abs(a).max())


def test_both_legs_in_one_pass_equal_leg_by_leg():
    """swing_inverse_dynamics_of_legs stacks the legs; each leg's moments, forces and valid frames must equal its
    own swing_inverse_dynamics (a right leg and a mirrored left leg with a different build and swing mask)."""
    rate = 500.0
    _, rmats, points = _leg_3d_motion(rate)
    mirror, keep_z_right = np.diag([1.0, -1.0, 1.0]), np.diag([1.0, 1.0, -1.0])
    m_points = [p @ mirror for p in points]
    m_rmats = [mirror @ r @ keep_z_right for r in rmats]
    heavier = dyn.leg_inertia(82.0, "female", L_THIGH * 1.05, L_SHANK * 0.97, L_FOOT)
    mask = np.zeros(len(points[0]), dtype=bool)
    mask[40:300] = True
    right = dyn.SwingLeg(*[Frames(o, r) for o, r in zip(points[:3], rmats)], *points, INERTIA)
    left = dyn.SwingLeg(*[Frames(o, r) for o, r in zip(m_points[:3], m_rmats)], *m_points, heavier, mask, "left")
    together = dyn.swing_inverse_dynamics_of_legs([right, left], rate)
    for leg, got in zip((right, left), together):
        alone = dyn.swing_inverse_dynamics(*leg[:8], rate, leg.inertia, swing_mask=leg.swing_mask, side=leg.side)
        np.testing.assert_array_equal(got.valid, alone.valid)
        for name in ("hip", "knee", "ankle", "hip_lab", "knee_lab", "ankle_lab", "hip_force_lab"):
            np.testing.assert_allclose(getattr(got, name), getattr(alone, name), rtol=1e-13, atol=1e-12)


def test_3d_chain_power_equals_rate_of_mechanical_energy():
    """Work-energy theorem for an arbitrary 3D motion of the three segments (rotations not confined to a plane):
    dE/dt = F_hip . v_hip + M_hip . w_thigh + M_knee . (w_shank - w_thigh) + M_ankle . (w_foot - w_shank)."""
    rate = 2000.0
    t, rmats, (hip, knee, ankle, heel, toe) = _leg_3d_motion(rate)
    frames = [Frames(o, r) for o, r in zip((hip, knee, ankle), rmats)]
    jm = dyn.swing_inverse_dynamics(*frames, hip, knee, ankle, heel, toe, rate, INERTIA)

    def omega(r):  # independent of the module: finite rotation between neighbouring frames (scipy)
        w = np.full((len(r), 3), np.nan)
        w[1:-1] = Rotation.from_matrix(np.einsum("fij,fkj->fik", r[2:], r[:-2])).as_rotvec() * rate / 2
        return w

    w = [omega(r) for r in rmats]
    coms = [hip + INERTIA["thigh"].com_fraction * (knee - hip), knee + INERTIA["shank"].com_fraction * (ankle - knee),
            heel + INERTIA["foot"].com_fraction * (toe - heel)]
    energy = np.zeros(len(t))
    for seg, c, r, ww in zip(dyn.SEGMENTS, coms, rmats, w):
        v = np.gradient(c, 1 / rate, axis=0)
        i_lab = r @ INERTIA[seg].inertia_local @ np.swapaxes(r, 1, 2)
        energy += INERTIA[seg].mass_kg * (0.5 * (v**2).sum(1) + 9.81 * c[:, 2])
        energy += 0.5 * np.einsum("fi,fij,fj->f", ww, i_lab, ww)
    e_rate = np.gradient(energy, 1 / rate)
    v_hip = np.gradient(hip, 1 / rate, axis=0)
    power = ((jm.hip_force_lab * v_hip).sum(1) + (jm.hip_lab * w[0]).sum(1) + (jm.knee_lab * (w[1] - w[0])).sum(1)
             + (jm.ankle_lab * (w[2] - w[1])).sum(1))
    inner = slice(10, -10)
    err = np.sqrt(np.mean((power[inner] - e_rate[inner]) ** 2))
    assert err < 0.005 * np.abs(e_rate[inner]).max()


# --------------------------------------------------------------------------- static optimisation
def _random_sharing_problem(rng, n_frames, n_muscles=9):
    """Moment-arm signs as in the swing model: 3 biarticular hamstrings, 1 knee flexor, 1 hip extensor,
    1 hip flexor, 1 hip flexor + knee extensor, 1 knee extensor, 1 knee flexor (m)."""
    signs = np.array([[-1, 1], [-1, 1], [-1, 1], [0, 1], [-1, 0], [1, 0], [1, -1], [0, -1], [0, 1]], dtype=float)
    arms = signs[None, :n_muscles] * rng.uniform(0.01, 0.07, (n_frames, n_muscles, 2))
    cap = rng.uniform(300.0, 6000.0, (n_frames, n_muscles))
    return arms, cap


def _slsqp(arms, cap, target):
    a_mat = (arms * cap[:, None]).T  # [2, m]
    a_mat, target = a_mat / np.abs(a_mat).max(), target / np.abs(a_mat).max()  # same constraints, well scaled
    m = arms.shape[0]
    res = minimize(lambda a: a @ a, np.full(m, 0.5), jac=lambda a: 2 * a, method="SLSQP",
                   bounds=[(0.0, 1.0)] * m,
                   constraints={"type": "eq", "fun": lambda a: a_mat @ a - target, "jac": lambda a: a_mat},
                   options={"ftol": 1e-12, "maxiter": 500})
    return res


def test_share_forces_matches_slsqp_on_random_frames():
    rng = np.random.default_rng(7)
    n = 40
    arms, cap = _random_sharing_problem(rng, n)
    truth_act = rng.uniform(0.0, 1.0, (n, arms.shape[1])) ** 2  # some feasible activations -> reachable moments
    target = np.einsum("fmj,fm->fj", arms, truth_act * cap)
    forces, met = dyn.share_forces(arms, cap, target)
    assert met.all()
    np.testing.assert_allclose(np.einsum("fmj,fm->fj", arms, forces), target, atol=1e-4)
    act = forces / cap
    assert (act >= -1e-12).all() and (act <= 1 + 1e-12).all()
    saturated = 0
    for f in range(n):
        ref = _slsqp(arms[f], cap[f], target[f])
        assert ref.success
        assert act[f] @ act[f] <= ref.fun + 1e-7  # never worse than SLSQP
        np.testing.assert_allclose(act[f], ref.x, atol=2e-4)
        saturated += int((ref.x > 1 - 1e-6).any() or (ref.x < 1e-6).any())
    assert saturated > n // 2  # the bounds were active in most frames, so the active-set part is exercised


def test_share_forces_interior_solution_is_closed_form():
    rng = np.random.default_rng(3)
    arms, cap = _random_sharing_problem(rng, 5)
    arms = np.abs(arms)  # all moment arms positive: unbounded optimum a = A^T (A A^T)^-1 M is positive
    target = np.full((5, 2), 20.0)
    forces, met = dyn.share_forces(arms, cap, target)
    for f in range(5):
        a_mat = (arms[f] * cap[f][:, None]).T
        expected = a_mat.T @ np.linalg.solve(a_mat @ a_mat.T, target[f])
        assert 0 < expected.min() and expected.max() < 1
        np.testing.assert_allclose(forces[f] / cap[f], expected, rtol=1e-8, atol=1e-12)
    assert met.all()


def test_share_forces_reports_unreachable_moments():
    rng = np.random.default_rng(11)
    arms, cap = _random_sharing_problem(rng, 6)
    max_knee_flexion = np.einsum("fm,fm->f", np.clip(arms[:, :, 1], 0, None), cap)
    target = np.stack([np.zeros(6), 1.5 * max_knee_flexion], axis=1)
    target[:3, 1] = 0.3 * max_knee_flexion[:3]  # first three reachable, last three beyond every knee flexor
    target[5] = np.nan  # outside swing
    forces, met = dyn.share_forces(arms, cap, target)
    assert met[:3].all() and not met[3:].any()
    assert np.isnan(forces[5]).all()
    for f in (3, 4):  # unmet: as close to the moments as the muscles can get (bounded least squares, scipy)
        a_mat = (arms[f] * cap[f][:, None]).T
        closest = lsq_linear(a_mat, target[f], bounds=(0.0, 1.0), method="bvls", tol=1e-12)
        achieved = np.linalg.norm(a_mat @ (forces[f] / cap[f]) - target[f])
        assert achieved <= np.linalg.norm(a_mat @ closest.x - target[f]) * (1 + 1e-3) + 1e-6
        assert (forces[f] >= 0).all() and (forces[f] <= cap[f] * (1 + 1e-12)).all()


def test_share_forces_without_any_capacity_gives_zero_force_not_met():
    rng = np.random.default_rng(5)
    arms, cap = _random_sharing_problem(rng, 2)
    cap[0] = 0.0  # e.g. every fibre outside its active range
    forces, met = dyn.share_forces(arms, cap, np.array([[10.0, 5.0], [0.0, 0.0]]))
    assert (forces == 0).all() and not met[0] and met[1]


# --------------------------------------------------------------------------- work
def test_negative_and_positive_work_closed_form():
    rate = 1000.0
    t = np.arange(0.0, 1.0 + 1e-12, 1 / rate)
    force = np.full_like(t, 1000.0)
    velocity = 0.5 * np.sin(2 * np.pi * t)  # lengthening in the first half, shortening in the second
    neg, pos = dyn.negative_positive_work(force, velocity, rate, 0, len(t))
    # integral of 500 sin(2 pi t) over half a period = 500 / pi J
    assert neg == pytest.approx(500 / np.pi, rel=1e-4)
    assert pos == pytest.approx(500 / np.pi, rel=1e-4)
    neg_half, pos_half = dyn.negative_positive_work(force, velocity, rate, 0, 501)
    assert neg_half == pytest.approx(500 / np.pi, rel=1e-4) and pos_half == pytest.approx(0.0, abs=1e-9)
    force_nan = force.copy()
    force_nan[10] = np.nan
    assert np.isnan(dyn.negative_positive_work(force_nan, velocity, rate, 0, 100)).all()
    md = dyn.MuscleDynamics("semitendinosus", force, velocity, -force * velocity, rate)
    assert md.work_over(0, 501) == (neg_half, pos_half)
    assert (md.power_w[1:500] < 0).all()  # delivered power is negative while the muscle absorbs energy


# --------------------------------------------------------------------------- muscles in the swing
@pytest.fixture(scope="module")
def swing_sharing(swing_sim):
    from hamstride.muscles import MuscleDims, muscle_states

    t, q, tau = swing_sim
    moments = _inverse_dynamics_from_markers(_planar_markers(t, q), RATE_HZ)
    angles = {"hip_flexion": q[:, 0], "hip_adduction": 0.05 * np.sin(9 * t), "hip_rotation": 0.05 + 0.1 * np.sin(6 * t),
              "knee_flexion": q[:, 0] - q[:, 1]}  # out-of-plane angles so the hamstrings also carry those moments
    states = muscle_states(angles, RATE_HZ, MuscleDims(0.26, 0.16, L_THIGH, L_SHANK), body_mass_kg=BODY_MASS,
                           height_m=1.80)
    return t, moments, angles, states, dyn.share_swing_moments(moments, states, angles, RATE_HZ)


def test_shared_forces_reproduce_the_moments_within_bounds(swing_sharing):
    t, moments, angles, states, res = swing_sharing
    met = res.valid & ~res.unmet
    assert met.sum() > 0.3 * res.valid.sum()  # late swing in particular must be met
    hip = sum(res.moment_arms_m[m][:, 0] * res.force_n[m] for m in res.force_n)
    knee = sum(res.moment_arms_m[m][:, 1] * res.force_n[m] for m in res.force_n)
    np.testing.assert_allclose(hip[met], moments.hip_flexion_nm[met], atol=1e-3)
    np.testing.assert_allclose(knee[met], moments.knee_flexion_nm[met], atol=1e-3)
    for m, f in res.force_n.items():
        assert (f[res.valid] >= 0).all(), m
    # a knee-flexor moment with a hip-extensor moment (late swing) is carried by the hamstrings
    late = met & (moments.knee_flexion_nm > 10) & (moments.hip_flexion_nm < -10)
    assert late.any()
    assert (sum(res.force_n[m][late] for m in ("biceps_femoris_long", "semitendinosus", "semimembranosus")) > 0).all()


# --------------------------------------------------------------------------- generated sprints (published behaviour)
def _sprint_swings(speed_m_s, side="right"):
    """Inverse dynamics and force sharing on the truth kinematics of a generated sprint (hamstride.synth);
    per complete swing: work in each half, lengthening-under-load fraction, peak-force timing."""
    from hamstride import synth
    from hamstride.muscles import MuscleDims, muscle_states

    spec = synth.SprintSpec(speed_m_s=speed_m_s, noise_mm=0.0, n_gaps=0, seed=4, duration_s=2.0)
    _, _, tr = synth.simulate_sprint(spec)
    b, rate = tr.body, tr.rate_hz
    moments = generated_swing_moments(tr, side)
    angles = {k: tr.angles[side][k] for k in ("hip_flexion", "hip_adduction", "hip_rotation", "knee_flexion")}
    states = muscle_states(angles, rate, MuscleDims(b.pelvis_width_m, b.pelvis_depth_m, b.thigh_length_m,
                                                    b.shank_length_m), body_mass_kg=b.mass_kg)
    md = dyn.muscle_dynamics(dyn.share_swing_moments(moments, states, angles, rate), rate)
    fs = np.sort(tr.foot_strikes_s[side])
    swings = []
    for to in np.sort(tr.toe_offs_s[side]):
        before, after = fs[fs < to], fs[fs > to]
        if not (before.size and after.size):
            continue
        a, z = int(np.ceil(to * rate)), int(np.floor(after[0] * rate))
        mid = (a + z) // 2
        knee_peak = a + int(np.argmax(angles["knee_flexion"][a:z + 1]))
        cycle = (after[0] - before[-1]) * rate
        out = {"late_swing_start": knee_peak}
        for m in ("biceps_femoris_long", "semitendinosus", "semimembranosus"):
            d = md[m]
            second = slice(mid, z + 1)
            peak, i_peak = d.peak_force(a, z + 1)
            out[m] = {
                "neg_first": d.work_over(a, mid + 1)[0],
                "neg_second": d.work_over(mid, z + 1)[0],
                "neg": d.work_over(a, z + 1)[0],
                "lengthening_under_load": np.mean((d.force_n[second] > 1.0) & (d.velocity_m_per_s[second] > 0)),
                "i_peak": i_peak,
                "peak_pct_cycle": 100 * (i_peak - before[-1] * rate) / cycle,
            }
        swings.append(out)
    assert len(swings) >= 2
    return swings


@pytest.fixture(scope="module")
def sprint_swings():
    return {speed: _sprint_swings(speed) for speed in (7.0, 9.0)}


def test_hamstrings_lengthen_under_load_and_absorb_energy_in_the_second_half_of_swing(sprint_swings):
    # Chumanov et al. 2011 (MSSE 43:525): lengthening under load from about 50 to 90 % of the gait cycle, negative
    # work in swing; Schache et al. 2012 (MSSE 44:647): large negative work in terminal swing [direction only].
    for swings in sprint_swings.values():
        for s in swings:
            for m in ("biceps_femoris_long", "semitendinosus", "semimembranosus"):
                w = s[m]
                assert w["neg_second"] > 1.0, m
                # most of it in the second half (the sources give the direction only; 1.5x is our line; Chumanov's
                # loaded lengthening starts near 50 % of the cycle, about a third into the swing, so part of it falls
                # in the first half). With compliant tendons the lightly loaded BFlh fibres sit higher on the
                # force-length curve in mid-swing and take part of the hip's braking before its flexion peak: BFlh
                # 1.6-1.9x at 7 m/s, 2.3-2.6x at 9 m/s (ST 5-11x, SM > 45x) since the generator's least-effort swing
                # (2.0-3.5x with the earlier constant-acceleration swing, whose faster late knee extension gave more
                # second-half work).
                assert w["neg_second"] > 1.5 * w["neg_first"], m
                assert w["lengthening_under_load"] > 0.3, m


def test_negative_work_rises_with_speed(sprint_swings):
    # Chumanov et al. 2011: hamstring negative work in swing rises with speed.
    def mean_work(swings):
        return np.mean([sum(s[m]["neg"] for m in ("biceps_femoris_long", "semitendinosus", "semimembranosus")) for s in swings])

    assert mean_work(sprint_swings[9.0]) > 1.1 * mean_work(sprint_swings[7.0])


def test_peak_hamstring_force_in_late_swing(sprint_swings):
    # Schache et al. 2012: peak force in terminal swing; Nagano et al. 2014 (J Sports Sci 32:1722): peak BF force at
    # 80.5 +- 2.9 % of the running cycle. Late swing = swing-phase peak knee flexion to foot strike (design.md).
    for swings in sprint_swings.values():
        for s in swings:
            for m in ("biceps_femoris_long", "semitendinosus", "semimembranosus"):
                assert s[m]["i_peak"] >= s["late_swing_start"], m
                assert 65.0 < s[m]["peak_pct_cycle"] < 95.0, m


# --------------------------------------------------------------------------- missing body mass (whole trial)
def test_missing_body_mass_keeps_kinematics_and_empties_forces(tmp_path):
    from hamstride import synth
    from hamstride.io import write_c3d
    from hamstride.pipeline import AthleteInfo, analyse_trial

    spec = synth.SprintSpec(speed_m_s=8.5, seed=3)
    labels, xyz, _ = synth.simulate_sprint(spec)
    write_c3d(tmp_path / "no_mass.c3d", labels, xyz, spec.rate_hz, units=spec.units)  # no subject body mass
    res = analyse_trial(tmp_path / "no_mass.c3d", athlete=AthleteInfo(athlete="SYN01"))
    assert len(res.strides) > 0
    assert np.isfinite(res.strides["peak_strain_pct"]).all()
    assert np.isfinite(res.curves["length_m"]).all()
    assert res.strides[["peak_force_n", "negative_work_j"]].isna().all().all()
    assert res.curves[["force_n", "power_w", "hip_moment_nm_per_kg", "knee_moment_nm_per_kg"]].isna().all().all()
    assert any("body mass" in w for w in res.info["warnings"])
    with_mass = analyse_trial(tmp_path / "no_mass.c3d", athlete=AthleteInfo(athlete="SYN01", body_mass_kg=75.0))
    assert np.isfinite(with_mass.strides["negative_work_j"]).all()
    assert (with_mass.strides["negative_work_j"] > 0).all()


# --------------------------------------------------------------------------- force sharing: uniqueness, continuity
def _beyond_capacity(rng, n):
    """Frames asking 0.8-3x the muscles' hip-extension and knee-flexion capacity (late swing of a fast sprint)."""
    arms, cap = _random_sharing_problem(rng, n)
    hip_ext = np.einsum("fm,fm->f", np.clip(-arms[:, :, 0], 0, None), cap)
    knee_flex = np.einsum("fm,fm->f", np.clip(arms[:, :, 1], 0, None), cap)
    k = rng.uniform(0.8, 3.0, (n, 2))
    return arms, cap, np.stack([-k[:, 0] * hip_ext, k[:, 1] * knee_flex], axis=1)


def test_share_forces_is_the_bounded_least_squares_solution_of_the_regularised_problem():
    """min 1/2|a|^2 + w/2 |(A a - M)/S|^2, 0 <= a <= 1 is the bounded least-squares problem
    |[I; sqrt(w) A/S] a - [0; sqrt(w) M/S]|^2: scipy's BVLS gives the unique solution on met and unmet frames."""
    rng = np.random.default_rng(21)
    arms, cap, target = _beyond_capacity(rng, 12)
    arms2, cap2 = _random_sharing_problem(rng, 12)
    target2 = np.einsum("fmj,fm->fj", arms2, rng.uniform(0.0, 1.0, (12, 9)) ** 2 * cap2)  # reachable
    arms, cap, target = (np.concatenate(p) for p in ((arms, arms2), (cap, cap2), (target, target2)))
    for w in (1e2, 1e4):  # moderate weights, where the regularisation visibly shapes the unmet frames
        forces, _ = dyn.share_forces(arms, cap, target, weight=w)
        for f in range(len(target)):
            a_mat = (arms[f] * cap[f][:, None]).T
            s = np.abs(a_mat).sum() + 1.0
            stacked = np.vstack([np.eye(a_mat.shape[1]), np.sqrt(w) * a_mat / s])
            rhs = np.concatenate([np.zeros(a_mat.shape[1]), np.sqrt(w) * target[f] / s])
            ref = lsq_linear(stacked, rhs, bounds=(0.0, 1.0), method="bvls", tol=1e-14).x
            np.testing.assert_allclose(forces[f] / cap[f], ref, atol=1e-7)


def test_share_forces_is_continuous_on_unmet_frames():
    """Tiny (1e-4 relative) changes of the target moments and moment arms change every force by a correspondingly
    tiny amount on frames beyond capacity: the solution of a strongly convex problem is Lipschitz in its data.
    Bound: 100 x the relative perturbation x the largest capacity (measured worst case about 25, near the corners
    of the achievable set where the solution is steep); a muscle flipping between part and full activation would
    be about 5000."""
    rng = np.random.default_rng(2)
    arms, cap, target = _beyond_capacity(rng, 300)
    rel = 1e-4
    forces, met = dyn.share_forces(arms, cap, target)
    assert (~met).sum() > 280
    for trial in range(3):
        t2 = target * (1 + rel * rng.choice([-1.0, 1.0], target.shape))
        a2 = arms * (1 + rel * rng.choice([-1.0, 1.0], arms.shape))
        forces2, _ = dyn.share_forces(a2, cap, t2)
        change = np.abs(forces2 - forces).max(axis=1)
        assert (change[~met] <= 100 * rel * cap.max(axis=1)[~met]).all()
    # the capacities too
    forces3, _ = dyn.share_forces(arms, cap * (1 + rel * rng.choice([-1.0, 1.0], cap.shape)), target)
    assert (np.abs(forces3 - forces).max(axis=1)[~met] <= 100 * rel * cap.max(axis=1)[~met]).all()


def test_share_forces_reaches_every_frame_and_met_frames_are_exact():
    """Met frames reproduce the moments to the stated tolerance; frames cut in two halves give the same answer
    (per-frame problem, no coupling between frames)."""
    rng = np.random.default_rng(8)
    arms, cap, target = _beyond_capacity(rng, 40)
    target[::2] *= 0.2  # some reachable
    forces, met = dyn.share_forces(arms, cap, target)
    assert met.any() and (~met).any()
    carried = np.einsum("fmj,fm->fj", arms, forces)
    scale = np.abs(arms * cap[:, :, None]).sum(axis=(1, 2)) + 1.0
    assert (np.abs(carried - target)[met] <= dyn.MOMENT_TOLERANCE * scale[met, None]).all()
    f1, m1 = dyn.share_forces(arms[:17], cap[:17], target[:17])
    np.testing.assert_allclose(f1, forces[:17], rtol=1e-9, atol=1e-9)
    assert (m1 == met[:17]).all()


# --------------------------------------------------------------------------- a symmetric pair of legs
@pytest.fixture(scope="module")
def symmetric_pair():
    """Truth kinematics of a generated 8.8 m/s sprint (right leg), and a copy with smooth 0.2 deg noise on every
    angle and 1 % smooth noise on the moments (what a nearly symmetric pair of legs looks like to the sharing)."""
    import dataclasses

    from hamstride import synth
    from hamstride.muscles import MuscleDims, muscle_states

    side = "right"
    spec = synth.SprintSpec(speed_m_s=8.8, noise_mm=0.0, n_gaps=0, seed=4, duration_s=2.0)
    _, _, tr = synth.simulate_sprint(spec)
    b, rate, n = tr.body, tr.rate_hz, len(tr.time_s)
    moments = generated_swing_moments(tr, side)
    angles = {k: tr.angles[side][k] for k in ("hip_flexion", "hip_adduction", "hip_rotation", "knee_flexion")}
    dims = MuscleDims(b.pelvis_width_m, b.pelvis_depth_m, b.thigh_length_m, b.shank_length_m)
    rng = np.random.default_rng(1)
    noise = lowpass(rng.standard_normal((n, 5)), rate, 15.0)
    noise /= noise.std(axis=0)
    angles2 = {k: v + np.radians(0.2) * noise[:, i] for i, (k, v) in enumerate(angles.items())}
    eps = 1 + 0.01 * noise[:, 4:5]
    moments2 = dataclasses.replace(moments, hip=moments.hip * eps, knee=moments.knee * eps)
    fs = np.sort(tr.foot_strikes_s[side])
    windows = [(int(np.ceil(t0 * rate)), int(np.floor(fs[fs > t0][0] * rate)))
               for t0 in np.sort(tr.toe_offs_s[side]) if (fs > t0).any()]
    out = []
    for ang, mom in ((angles, moments), (angles2, moments2)):
        states = muscle_states(ang, rate, dims, body_mass_kg=b.mass_kg)
        res = dyn.share_swing_moments(mom, states, ang, rate)
        md = dyn.muscle_dynamics(res, rate)
        out.append(({m: np.array([md[m].work_over(a, z + 1)[0] for a, z in windows]) for m in ("biceps_femoris_long", "semitendinosus", "semimembranosus")},
                    res))
    return out


def test_nearly_identical_legs_give_nearly_identical_negative_work(symmetric_pair):
    (work, res), (work2, _) = symmetric_pair
    assert res.unmet[res.valid].mean() > 0.3  # many frames beyond capacity: the case that used to worry us
    for m in work:
        assert (work[m] > 1.0).all(), m
        np.testing.assert_allclose(work2[m], work[m], rtol=0.05, err_msg=m)  # within 5 % per swing
        assert abs(work2[m].mean() / work[m].mean() - 1) < 0.02, m  # and 2 % over the trial


def test_adductor_magnus_is_a_hip_extensor_growing_with_flexion():
    # posterior adductor magnus: hip extensor whose arm grows with hip flexion (from memory, Németh & Ohlsén 1985)
    m = dyn.OTHER_MUSCLES["amag"]
    arms = m.hip_moment_arm(np.radians([0.0, 45.0, 90.0]))
    assert (arms < 0).all() and arms[0] > arms[1] > arms[2]
    assert (m.knee_moment_arm(np.radians([0.0, 90.0])) == 0).all()


def test_window_work_equals_negative_positive_work_for_every_window():
    rng = np.random.default_rng(0)
    force, velocity = rng.normal(size=(300, 4)), rng.normal(size=(300, 4))
    velocity[60, 2] = np.nan  # makes the windows containing frame 60 NaN in that column only
    starts, stops = np.array([0, 40, 55, 100, 298, 10]), np.array([30, 90, 70, 101, 300, 11])
    absorbed, produced = dyn.window_work(force, velocity, 250.0, starts, stops)
    for w, (a, b) in enumerate(zip(starts, stops)):
        for c in range(4):
            ref = dyn.negative_positive_work(force[:, c], velocity[:, c], 250.0, a, b)
            np.testing.assert_allclose([absorbed[w, c], produced[w, c]], ref, rtol=1e-13, equal_nan=True)
    assert np.isnan(absorbed[2, 2]) and np.isfinite(absorbed[2, 1])
    assert np.isnan(absorbed[3]).all() and np.isnan(absorbed[5]).all()  # one frame: no interval to integrate
    empty = dyn.window_work(force, velocity, 250.0, [5, 9], [5, 9])  # only empty windows (a stride without swing)
    assert all(np.isnan(part).all() and part.shape == (2, 4) for part in empty)


def test_share_forces_warm_start_gives_the_cold_solution():
    # The problem is strictly convex, so any starting multipliers end at the same solution up to the solver's
    # tolerance; the warm start (another problem's multipliers, as the Monte Carlo band uses) saves Newton steps.
    # On frames far beyond capacity the regularised tie-break is weak, so the tolerance there is looser (our lines:
    # 2.5 % of a muscle's capacity, 1 N m of moment, the same met frames).
    rng = np.random.default_rng(7)
    n, m = 400, 8
    arms = rng.normal(0.0, 0.04, (n, m, 2))
    cap = rng.uniform(200.0, 3000.0, (n, m))
    target = rng.normal(0.0, 150.0, (n, 2))
    cold, met_cold, dual = dyn.share_forces(arms, cap, target, return_dual=True)
    other, _, other_dual = dyn.share_forces(arms * 1.1, cap * 0.8, target * 1.2, return_dual=True)
    warm, met_warm = dyn.share_forces(arms, cap, target, initial_dual=other_dual)
    assert (np.abs(warm - cold) <= 0.025 * cap).all()
    moments = [np.einsum("fmj,fm->fj", arms, f) for f in (warm, cold)]
    assert np.abs(moments[0] - moments[1]).max() < 1.0
    np.testing.assert_array_equal(met_warm, met_cold)
    met = met_cold
    np.testing.assert_allclose(warm[met], cold[met], atol=1e-3 * cap.max())  # reachable frames: the same forces
    assert np.isfinite(dual).all()
