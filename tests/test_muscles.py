"""Hamstring model checks against published data, exact calculus and independent geometry.

Sources are named beside every check value; "from memory" marks values not verified in the source
(see ../shared/references.md for the status of each).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.interpolate import CubicSpline
from scipy.optimize import brentq, minimize
from scipy.spatial.transform import Rotation

from hamstride import muscles as M
from hamstride.errors import HamstrideError, PlausibilityError

DIMS = M.MuscleDims.from_height(1.80)
DEG = np.pi / 180.0


def arms_mm(muscle, hip_deg, knee_deg, dims=DIMS, add_deg=0.0, rot_deg=0.0):
    return 1000.0 * M.moment_arms(muscle, np.deg2rad(hip_deg), np.deg2rad(add_deg), np.deg2rad(rot_deg),
                                  np.deg2rad(knee_deg), dims)


# --------------------------------------------------------------------------------------------------------------
# Parametric sprint kinematics (used until/besides hamstride.synth): periodic splines through key points of a
# top-speed stride, foot strike at 0 %. Ranges from references.md "Typical sprint kinematics" [from memory]: peak
# hip flexion 65-80 deg vs pelvis (here 75 deg at 78 %), hip extension 5-15 deg near toe-off (here 8 deg at 30 %),
# peak swing knee flexion 120-135 deg (here 125 deg at 50 %), knee 15-30 deg at foot strike (here 22 deg); toe-off
# at 22 % (Mann & Hagy 1980 [verified]); stride 0.46 s (0.40-0.46 s, from memory) at about 8.5 m/s.
# --------------------------------------------------------------------------------------------------------------
HIP_KEYS = [(0, 45), (10, 28), (22, 0), (30, -8), (40, 5), (55, 40), (68, 66), (78, 75), (88, 64), (100, 45)]
KNEE_KEYS = [(0, 22), (8, 36), (22, 24), (35, 70), (50, 125), (60, 118), (70, 85), (80, 48), (88, 26), (94, 17),
             (100, 22)]
STRIDE_S = 0.46
RATE_HZ = 500.0


def _periodic(keys, pct):
    p, v = np.array(keys, dtype=float).T
    spline = CubicSpline(p, v, bc_type="periodic")
    return np.deg2rad(spline(np.mod(pct, 100.0)))


def sprint_angles(n_strides=3, hip_peak_reduction_deg=0.0):
    """Angles (rad) over ``n_strides`` strides at RATE_HZ; optionally less late-swing hip flexion (a smooth
    Gaussian bump over late swing, centred at 87 % with SD 15 % of the cycle)."""
    t = np.arange(int(round(n_strides * STRIDE_S * RATE_HZ))) / RATE_HZ
    return t, 100.0 * t / STRIDE_S, sprint_angles_at(t, hip_peak_reduction_deg)


def sprint_angles_at(t, hip_peak_reduction_deg=0.0):
    pct = 100.0 * np.asarray(t) / STRIDE_S
    phase = np.mod(pct, 100.0)
    hip = _periodic(HIP_KEYS, pct)
    if hip_peak_reduction_deg:
        hip = hip - np.deg2rad(hip_peak_reduction_deg) * np.exp(-0.5 * ((phase - 87.0) / 15.0) ** 2)
    return {
        "hip_flexion": hip,
        "hip_adduction": np.deg2rad(4.0 * np.sin(2 * np.pi * pct / 100.0)),  # a few degrees (assumption)
        "hip_rotation": np.deg2rad(5.0 * np.cos(2 * np.pi * pct / 100.0)),
        "knee_flexion": _periodic(KNEE_KEYS, pct),
    }


def _synth_cycles():
    """Truth angles of hamstride.synth when that module exists (right side), else None."""
    try:
        from hamstride import synth
    except ImportError:
        return None
    _, _, truth = synth.simulate_sprint(synth.SprintSpec())
    angles = {k: np.asarray(truth.angles["right"][k]) for k in M.ANGLE_NAMES}
    strikes = np.asarray(truth.foot_strikes_s["right"] if isinstance(truth.foot_strikes_s, dict)
                         else truth.foot_strikes_s)
    body = truth.body
    dims = M.MuscleDims(body.pelvis_width_m, body.pelvis_depth_m, body.thigh_length_m, body.shank_length_m)
    return angles, float(truth.rate_hz), strikes, dims


def late_swing_peaks(strain, pct):
    """Per stride (whole strides only): peak strain in the second half of the cycle and its time in % of cycle."""
    peaks, times = [], []
    stride = np.floor(pct / 100.0).astype(int)
    for k in range(stride.max()):
        idx = np.flatnonzero((stride == k) & (np.mod(pct, 100.0) >= 50.0))
        i = idx[np.argmax(strain[idx])]
        peaks.append(strain[i])
        times.append(np.mod(pct[i], 100.0))
    return np.array(peaks), np.array(times)


# --------------------------------------------------------------------------------------------------------------
# Moment arms vs published data
# --------------------------------------------------------------------------------------------------------------
def test_knee_moment_arms_in_textbook_ranges_between_30_and_90_deg():
    # Textbook excerpt (references.md [verified, attribution unconfirmed]): ST 40-55 mm, SM 20-40 mm, BF about
    # 20 mm (we allow 15-30 mm), knee flexion 30-90 deg; hip at 0 deg.
    knee = np.linspace(30.0, 90.0, 61)
    ranges = {"semitendinosus": (40.0, 55.0), "semimembranosus": (20.0, 40.0), "biceps_femoris_long": (15.0, 30.0)}
    for muscle, (low, high) in ranges.items():
        r = arms_mm(muscle, 0.0, knee)[:, 3]
        assert np.all((r >= low) & (r <= high)), (muscle, r.min(), r.max())
    # Ordering ST > SM > BF at 50-90 deg (Herzog & Read 1993; Buford et al. 1997, from memory).
    mid = np.linspace(50.0, 90.0, 9)
    st, sm, bf = (arms_mm(m, 0.0, mid)[:, 3] for m in ("semitendinosus", "semimembranosus", "biceps_femoris_long"))
    assert np.all(st > sm) and np.all(sm > bf)


def test_biceps_femoris_knee_arm_roughly_constant_and_length_dominated_by_hip():
    # Visser et al. 1990 (Eur J Appl Physiol 61:453) [verified]: BF knee moment arm about constant over the knee
    # range; hip angle changes BF length much more than knee angle.
    knee = np.linspace(0.0, 90.0, 91)
    bf = arms_mm("biceps_femoris_long", 0.0, knee)[:, 3]
    st = arms_mm("semitendinosus", 0.0, knee)[:, 3]
    assert bf.max() - bf.min() < 10.0  # mm, "about constant" (our threshold)
    assert (bf.max() - bf.min()) < 0.5 * (st.max() - st.min())
    length = lambda h, k: M.musculotendon_length("biceps_femoris_long", h * DEG, 0.0, 0.0, k * DEG, DIMS)
    assert abs(length(90, 0) - length(0, 0)) > 1.5 * abs(length(0, 90) - length(0, 0))  # same 90 deg excursion
    # and pointwise over the sprint range (hip 0-70 deg, knee 0-90 deg)
    hip_grid, knee_grid = np.meshgrid(np.linspace(0, 70, 8), np.linspace(0, 90, 10))
    r = arms_mm("biceps_femoris_long", hip_grid, knee_grid)
    assert np.all(np.abs(r[..., 0]) > np.abs(r[..., 3]))


def test_max_hip_moment_arm_larger_than_max_knee_moment_arm():
    # Kellis & Blazevich 2022 (BMC Sports Sci Med Rehabil 14:166) [verified].
    hip = np.linspace(-20.0, 120.0, 141)
    knee = np.linspace(0.0, 140.0, 141)
    for muscle in M.BIARTICULAR:
        max_hip = np.max(-arms_mm(muscle, hip, 0.0)[:, 0])
        max_knee = np.max(arms_mm(muscle, 0.0, knee)[:, 3])
        assert max_hip > max_knee, (muscle, max_hip, max_knee)


def test_hip_extension_moment_arm_near_neutral():
    # Nemeth & Ohlsen 1985: about 5-7 cm near neutral (from memory); accepted 4-8 cm, hip -10..+10 deg.
    hip = np.linspace(-10.0, 10.0, 5)
    for muscle in M.BIARTICULAR:
        r = -arms_mm(muscle, hip, 0.0)[:, 0]
        assert np.all((r >= 40.0) & (r <= 80.0)), (muscle, r)
    # smaller in deep flexion (same source, from memory)
    for muscle in M.BIARTICULAR:
        assert -arms_mm(muscle, 100.0, 0.0)[0] < -arms_mm(muscle, 0.0, 0.0)[0]


def test_moment_arm_signs_follow_the_contract():
    # DEVELOPERS.md: r = -dL/dtheta; hamstrings negative at hip flexion, positive at knee flexion.
    hip, knee = np.meshgrid(np.linspace(-10, 110, 13), np.linspace(0, 130, 14))
    for muscle in M.BIARTICULAR:
        r = arms_mm(muscle, hip, knee)
        assert np.all(r[..., 0] < 0) and np.all(r[..., 3] > 0)
    r = arms_mm("biceps_femoris_short", hip, knee)
    assert np.all(r[..., :3] == 0.0) and np.all(r[..., 3] > 0)


# --------------------------------------------------------------------------------------------------------------
# Exactness of the calculus and the geometry
# --------------------------------------------------------------------------------------------------------------
def random_postures(n, seed=1):
    rng = np.random.default_rng(seed)
    return (np.deg2rad(rng.uniform(-25, 125, n)), np.deg2rad(rng.uniform(-25, 25, n)),
            np.deg2rad(rng.uniform(-35, 35, n)), np.deg2rad(rng.uniform(-5, 150, n)))


@pytest.mark.parametrize("muscle", M.MUSCLES)
def test_moment_arms_equal_central_finite_difference(muscle):
    # Tendon excursion (Spoor & van Leeuwen 1992): r = -dL/dtheta; central difference h = 1e-6 rad has error
    # ~ h^2 L''' + eps L / h, far below the 1e-6 m/rad tolerance of the issue.
    postures = random_postures(2000)
    r = M.moment_arms(muscle, *postures, DIMS)
    h = 1e-6
    for j in range(4):
        up = list(postures)
        down = list(postures)
        up[j] = up[j] + h
        down[j] = down[j] - h
        fd = -(M.musculotendon_length(muscle, *up, DIMS) - M.musculotendon_length(muscle, *down, DIMS)) / (2 * h)
        assert np.max(np.abs(fd - r[:, j])) < 1e-6, (muscle, M.ANGLE_NAMES[j])


@pytest.mark.parametrize("muscle", M.MUSCLES)
def test_moment_arms_equal_complex_step_derivative(muscle):
    # Complex-step differentiation (Squire & Trapp 1998, SIAM Rev 40:110): dL/dtheta = Im L(theta + i h) / h with
    # no subtractive cancellation, exact to rounding for any tiny h; the path function is complex-analytic. The
    # analytic end-point gradient behind moment_arms must agree to rounding (1e-15 m/rad, about 1e-13 of the arm),
    # on both sides of the wrap (each branch occurs in these postures).
    postures = random_postures(4000, seed=3)
    path = M.muscle_path(muscle, DIMS)
    r = M.moment_arms(muscle, *postures, DIMS)
    wraps = M.wrap_arc_rad(muscle, *postures, DIMS) > 0
    assert 0 < wraps.sum() < wraps.size
    step = 1e-30
    for j in range(4):
        stepped = list(postures)
        stepped[j] = postures[j] + 1j * step
        complex_step = -np.imag(M._path_length(path, *stepped)) / step
        np.testing.assert_allclose(r[:, j], complex_step, rtol=0, atol=1e-15, err_msg=f"{muscle} {M.ANGLE_NAMES[j]}")


def test_straight_path_matches_scipy_rotation_convention():
    # Independent: femur pose by scipy's intrinsic Z-X-Y Euler (Grood & Suntay JCS), then the plain 3-D distance
    # origin-insertion wherever the path does not touch the condylar cylinder.
    hf, ad, ro, kf = random_postures(500, seed=7)
    for muscle in M.BIARTICULAR:
        path = M.muscle_path(muscle, DIMS)
        femur = Rotation.from_euler("ZXY", np.column_stack([hf, ad, ro]))
        tibia = Rotation.from_euler("Z", -kf[:, None])
        knee = np.array([0.0, -DIMS.thigh_length_m, 0.0])
        insertion_in_pelvis = femur.apply(knee + tibia.apply(path.insertion_m))  # relative to the hip centre
        expected = np.linalg.norm(insertion_in_pelvis - path.origin_m, axis=1)
        got = M.musculotendon_length(muscle, hf, ad, ro, kf, DIMS)
        clear = M.wrap_arc_rad(muscle, hf, ad, ro, kf, DIMS) <= 0
        assert clear.sum() > 300
        np.testing.assert_allclose(got[clear], expected[clear], rtol=0, atol=1e-12)
        assert np.all(got[~clear] > expected[~clear])  # wrapping only ever lengthens the path


def test_left_side_mirror_gives_the_same_lengths():
    # DEVELOPERS.md: on the left, adduction and internal rotation are negated so the same anatomical motion has the
    # same sign. Build the mirrored left leg with scipy (points z -> -z, femur = Rz(f) Rx(-a) Ry(-r)) and check the
    # straight-path length equals the right-side model at the same anatomical angles.
    hf, ad, ro, kf = random_postures(400, seed=11)
    for muscle in M.BIARTICULAR:
        path = M.muscle_path(muscle, DIMS)
        mirror = np.array([1.0, 1.0, -1.0])
        femur = Rotation.from_euler("ZXY", np.column_stack([hf, -ad, -ro]))
        tibia = Rotation.from_euler("Z", -kf[:, None])
        knee = np.array([0.0, -DIMS.thigh_length_m, 0.0])
        insertion = femur.apply(knee + tibia.apply(path.insertion_m * mirror))
        left = np.linalg.norm(insertion - path.origin_m * mirror, axis=1)
        clear = M.wrap_arc_rad(muscle, hf, ad, ro, kf, DIMS) <= 0
        np.testing.assert_allclose(M.musculotendon_length(muscle, hf, ad, ro, kf, DIMS)[clear], left[clear],
                                   rtol=0, atol=1e-12)


def test_wrapped_length_is_the_shortest_path_around_the_cylinder():
    # Physics: the wrapped length equals the shortest path origin -> cylinder surface -> helix -> surface ->
    # insertion whose straight parts stay outside the cylinder, found numerically by scipy's SLSQP (independent of
    # our closed-form tangent construction).
    posture = np.deg2rad([0.0, 5.0, 10.0, 0.0])  # BFlh wraps near full extension
    muscle = "biceps_femoris_long"
    assert M.wrap_arc_rad(muscle, *posture, DIMS) > 0
    path = M.muscle_path(muscle, DIMS)
    ox, oy, oz, ix, iy, iz = (float(v) for v in M._endpoints(path, *posture))
    radius = path.wrap_radius_m
    on_cylinder = lambda a: radius * np.array([np.cos(a), np.sin(a)])

    def length(x):
        a1, z1, a2, z2 = x
        helix = np.hypot(radius * (a2 - a1), z2 - z1)
        return (np.linalg.norm(np.r_[on_cylinder(a1) - [ox, oy], z1 - oz]) + helix
                + np.linalg.norm(np.r_[on_cylinder(a2) - [ix, iy], z2 - iz]))

    def clearance(end, a):  # smallest sagittal distance of the segment end -> cylinder point from the axis, minus R
        start = on_cylinder(a)
        d = np.asarray(end) - start
        t = np.clip(-(start @ d) / (d @ d), 0.0, 1.0)
        return np.hypot(*(start + t * d)) - radius

    constraints = [{"type": "ineq", "fun": lambda x: clearance([ox, oy], x[0]) + 1e-12},
                   {"type": "ineq", "fun": lambda x: clearance([ix, iy], x[2]) + 1e-12},
                   {"type": "ineq", "fun": lambda x: x[2] - x[0]}]
    best = np.inf
    for a1 in np.linspace(0.5 * np.pi, 1.5 * np.pi, 3):
        for a2 in np.linspace(np.pi, 2 * np.pi, 3):
            res = minimize(length, [a1, oz, a2, iz], method="SLSQP", constraints=constraints,
                           options=dict(ftol=1e-14, maxiter=1000))
            if all(c["fun"](res.x) >= -1e-9 for c in constraints):
                best = min(best, res.fun)
    assert M.musculotendon_length(muscle, *posture, DIMS) == pytest.approx(best, abs=1e-9)


def test_path_never_enters_the_condylar_cylinder():
    # Geometry: when the model uses the straight line, the sagittal segment stays outside the cylinder (the path
    # stays behind the femoral condyles); when it wraps, the straight line would have cut through.
    postures = random_postures(3000, seed=3)
    for muscle in M.MUSCLES:
        path = M.muscle_path(muscle, DIMS)
        ox, oy, _, ix, iy, _ = M._endpoints(path, *postures)
        dx, dy = ix - ox, iy - oy
        t = np.clip(-(ox * dx + oy * dy) / (dx * dx + dy * dy), 0.0, 1.0)
        closest = np.hypot(ox + t * dx, oy + t * dy)
        wraps = M.wrap_arc_rad(muscle, *postures, DIMS) > 0
        assert np.all(closest[~wraps] >= path.wrap_radius_m - 1e-12)
        assert np.all(closest[wraps] < path.wrap_radius_m)


def test_length_depends_on_hip_adduction_and_rotation():
    # The path is 3-D: out-of-plane hip motion changes length (issue requirement).
    base = M.musculotendon_length("biceps_femoris_long", 0.5, 0.0, 0.0, 0.3, DIMS)
    assert abs(M.musculotendon_length("biceps_femoris_long", 0.5, 0.2, 0.0, 0.3, DIMS) - base) > 1e-3
    assert abs(M.musculotendon_length("biceps_femoris_long", 0.5, 0.0, 0.3, 0.3, DIMS) - base) > 1e-4


def test_velocity_identity_matches_numerical_derivative_on_sprint():
    # Excursion identity v = -sum r_j dtheta_j/dt vs np.gradient of L: within 1 % of the peak speed (issue).
    _, _, angles = sprint_angles(3)
    states = M.muscle_states(angles, RATE_HZ, DIMS)
    for muscle, st in states.items():
        numeric = np.gradient(st.length_m, 1.0 / RATE_HZ)
        inner = slice(5, -5)
        err = np.max(np.abs(st.velocity_m_per_s[inner] - numeric[inner]))
        assert err < 0.01 * np.max(np.abs(numeric)), muscle


def test_velocity_identity_is_exact_for_smooth_motion():
    # Chain rule: dL/dt = sum_j (dL/dtheta_j) dtheta_j/dt exactly; with the angles' own time derivative (central
    # difference of the smooth spline motion, h = 1e-6 s) the identity matches dL/dt to ~1e-9 m/s.
    t, _, angles = sprint_angles(1)
    h = 1e-6
    shifted = {sign: sprint_angles_at(t + sign * h) for sign in (-1, 1)}
    rates = np.stack([(shifted[1][k] - shifted[-1][k]) / (2 * h) for k in M.ANGLE_NAMES], axis=-1)
    for muscle in M.MUSCLES:
        r = M.moment_arms(muscle, *(angles[k] for k in M.ANGLE_NAMES), DIMS)
        v_identity = -np.sum(r * rates, axis=-1)
        length = {sign: M.musculotendon_length(muscle, *(shifted[sign][k] for k in M.ANGLE_NAMES), DIMS)
                  for sign in (-1, 1)}
        v_direct = (length[1] - length[-1]) / (2 * h)
        assert np.max(np.abs(v_identity - v_direct)) < 1e-6, muscle


def test_scaling_with_athlete_size():
    # Geometric similarity: all four dimensions x1.1 scale every path length by exactly 1.1 (the origins are
    # offsets from the hip centre, so the constant terms of Harrington's regression drop out).
    big = M.MuscleDims(*(1.1 * np.array([DIMS.pelvis_width_m, DIMS.pelvis_depth_m, DIMS.thigh_length_m,
                                         DIMS.shank_length_m])))
    posture = np.deg2rad([40.0, 5.0, -5.0, 60.0])
    for muscle in M.MUSCLES:
        ratio = M.musculotendon_length(muscle, *posture, big) / M.musculotendon_length(muscle, *posture, DIMS)
        assert ratio == pytest.approx(1.1, rel=1e-12)
    longer = M.MuscleDims(DIMS.pelvis_width_m, DIMS.pelvis_depth_m, DIMS.thigh_length_m + 0.02, DIMS.shank_length_m)
    assert M.musculotendon_length("semitendinosus", 0.0, 0.0, 0.0, 0.0, longer) > M.musculotendon_length("semitendinosus", 0, 0, 0, 0, DIMS)


def test_implausible_dimensions_and_unknown_muscle_raise():
    with pytest.raises(PlausibilityError, match="metres"):
        M.MuscleDims(261.0, 162.0, 441.0, 443.0)  # millimetres by mistake
    with pytest.raises(HamstrideError, match="unknown muscle"):
        M.musculotendon_length("rf", 0.0, 0.0, 0.0, 0.0, DIMS)
    with pytest.raises(HamstrideError, match="missing"):
        M.muscle_states({"hip_flexion": np.zeros(3)}, 200.0, DIMS)


# --------------------------------------------------------------------------------------------------------------
# Architecture, fibre length and force curves
# --------------------------------------------------------------------------------------------------------------
def test_architecture_is_ward_2009_and_strength_comes_from_the_athletes_muscle_volume():
    # Ward et al. 2009 [verified l_opt and pennation]: BFlh 9.76 cm / 11.6 deg, ST 19.30 / 12.9, SM 6.90 / 15.1,
    # BFsh 11.03 / 12.3.
    assert M.ARCHITECTURE["biceps_femoris_long"].optimal_fibre_length_m == pytest.approx(0.0976)
    assert M.ARCHITECTURE["semimembranosus"].pennation_rad == pytest.approx(np.deg2rad(15.1))
    # Worked by hand: 75 kg x 1.80 m -> limb volume 47 x 135 + 1285 = 7630 cm^3 (Handsfield et al. 2014 [M]);
    # SM 3.7 % of it = 282.31 cm^3 / 6.90 cm = 40.914 cm^2 x 26.8 N/cm^2 (Persad et al. 2024 [V]) x cos 15.1 deg
    # = 1058.6 N for the general population; x 1.30 for a sprinter's hip- and knee-crossing muscles (Handsfield et
    # al. 2017, Scand J Med Sci Sports 27:1072: +30 % per height x mass [V abstract]) = 1376.2 N by default.
    general = 0.037 * (47.0 * 75.0 * 1.80 + 1285.0) / 6.90 * 26.8 * np.cos(np.deg2rad(15.1))
    assert general == pytest.approx(1058.6, abs=0.1)
    assert M.max_isometric_force("semimembranosus", body_mass_kg=75.0, height_m=1.80, sprinter_volume_ratio=1.0) \
        == pytest.approx(general)
    hand = 1.30 * general
    assert M.max_isometric_force("semimembranosus", body_mass_kg=75.0, height_m=1.80) == pytest.approx(hand)
    # the athlete's own factor multiplies it; volume grows with mass x height
    assert M.max_isometric_force("semimembranosus", body_mass_kg=75.0, height_m=1.80, strength_factor=1.3) \
        == pytest.approx(1.3 * hand)
    light = M.max_isometric_force("semimembranosus", body_mass_kg=60.0, height_m=1.80)
    heavy = M.max_isometric_force("semimembranosus", body_mass_kg=90.0, height_m=1.80)
    assert heavy / light == pytest.approx((47.0 * 162.0 + 1285.0) / (47.0 * 108.0 + 1285.0))
    with pytest.raises(HamstrideError, match="body mass"):
        M.max_isometric_force("semimembranosus", body_mass_kg=None, height_m=1.8)
    with pytest.raises(HamstrideError, match="strength factor"):
        M.max_isometric_force("semimembranosus", body_mass_kg=70.0, height_m=1.8, strength_factor=0.0)
    assert np.isnan(M.athlete_max_forces(None, 1.8)["semimembranosus"])


def test_fibre_length_constant_thickness_and_slack_assumption():
    # Constant thickness: l sin(alpha) = l_opt sin(alpha_opt) (Zajac 1989 [M]). (That the slack rule puts BFlh at
    # 1.071 l_opt in its own reference posture is its definition, not a check, so it is not asserted.)
    arch = M.ARCHITECTURE["biceps_femoris_long"]
    slack = M.tendon_slack_length("biceps_femoris_long", DIMS)
    ref_length = M.musculotendon_length("biceps_femoris_long", *M.SLACK_REFERENCE_POSTURE_RAD, DIMS)
    fibre, alpha = M.fibre_length(np.array([ref_length, ref_length + 0.03]), slack, arch.optimal_fibre_length_m,
                                  arch.pennation_rad)
    np.testing.assert_allclose(fibre * np.sin(alpha), arch.optimal_fibre_length_m * np.sin(arch.pennation_rad))
    # l/l_opt depends on the slack length: +1 cm slack lowers it by about 1 cm / l_opt (rigid tendon)
    _, _, angles = sprint_angles(1)
    default = M.muscle_states(angles, RATE_HZ, DIMS)["biceps_femoris_long"]
    shifted = M.muscle_states(angles, RATE_HZ, DIMS, tendon_slack_lengths_m={"biceps_femoris_long": slack + 0.01})["biceps_femoris_long"]
    drop = default.fibre_length_lopt.max() - shifted.fibre_length_lopt.max()
    assert drop == pytest.approx(0.01 / arch.optimal_fibre_length_m, rel=0.05)
    np.testing.assert_array_equal(default.strain, shifted.strain)  # strain does not depend on it
    assert "slack" in M.TENDON_SLACK_NOTE


def _sympy_curve(name, x):
    """A De Groote et al. 2016 curve evaluated by sympy's independent implementation (published constants)."""
    sympy = pytest.importorskip("sympy")
    from sympy.physics import biomechanics as bio
    return float(getattr(bio, name).with_defaults(sympy.Float(x)).doit().evalf(20))


@pytest.mark.parametrize("l_norm", [0.4, 0.5, 0.75, 0.9, 1.0, 1.1, 1.25, 1.5, 1.8])
def test_active_force_length_is_de_groote_2016_at_named_points(l_norm):
    # Reference: sympy.physics.biomechanics.FiberForceLengthActiveDeGroote2016 (De Groote et al. 2016 constants).
    assert M.active_force_length(l_norm) == pytest.approx(_sympy_curve("FiberForceLengthActiveDeGroote2016", l_norm),
                                                          rel=1e-12)


@pytest.mark.parametrize("l_norm", [1.0, 1.2, 1.4, 1.6, 1.7])
def test_passive_force_length_is_de_groote_2016_above_optimal_length(l_norm):
    # sympy's FiberForceLengthPassiveDeGroote2016; 1 F0 at 1.6 l_opt (e0 = 0.6). Below l_opt the published curve
    # dips to -0.019 F0; we take it as 0 (tested below), so only l >= 1 is compared.
    expected = _sympy_curve("FiberForceLengthPassiveDeGroote2016", l_norm)
    assert M.passive_force_length(l_norm) == pytest.approx(expected, abs=1e-12)
    assert M.passive_force_length(0.8) == 0.0


@pytest.mark.parametrize("w", [-1.0, -0.5, -0.25, -0.1, 0.0, 0.1, 0.25, 0.5, 1.0])
def test_force_velocity_is_de_groote_2016_with_an_eccentric_branch(w):
    # sympy's FiberForceVelocityDeGroote2016 at v / v_max = w (lengthening positive); our input is l_opt/s.
    expected = _sympy_curve("FiberForceVelocityDeGroote2016", w)
    assert M.force_velocity(w * M.MAX_SHORTENING_VELOCITY_LOPT_PER_S) == pytest.approx(max(expected, 0.0), rel=1e-12)


def test_force_velocity_shape_matches_published_behaviour():
    # Isometric ~1; lengthening force above isometric, rising toward about 1.8 F0 (Katz 1939: 1.5-1.8 [M]);
    # shortening force falls to ~0 at v_max (Hill 1938).
    vmax = M.MAX_SHORTENING_VELOCITY_LOPT_PER_S
    assert M.force_velocity(0.0) == pytest.approx(1.0, abs=0.005)
    ecc = M.force_velocity(np.linspace(0.0, vmax, 50))
    assert np.all(np.diff(ecc) > 0) and 1.7 < ecc[-1] < 1.9
    assert M.force_velocity(-vmax) < 0.02 and M.force_velocity(-2 * vmax) == 0.0


@pytest.mark.parametrize("strain", [0.0, 0.01, 0.03, 0.049, 0.06])
def test_tendon_curve_is_de_groote_2016_and_its_inverse(strain):
    expected = max(_sympy_curve("TendonForceLengthDeGroote2016", 1.0 + strain), 0.0)
    assert M.tendon_force_length(1.0 + strain) == pytest.approx(expected, abs=1e-12)
    if expected > 0:
        assert M.tendon_strain(expected) == pytest.approx(strain, rel=1e-10)


# --------------------------------------------------------------------------------------------------------------
# Sprint checks
# --------------------------------------------------------------------------------------------------------------
def _sprint_sources():
    t, pct, angles = sprint_angles(3)
    yield "parametric", angles, RATE_HZ, pct, DIMS
    synth = _synth_cycles()
    if synth is not None:
        angles, rate, strikes, dims = synth
        n = len(angles["hip_flexion"])
        time = np.arange(n) / rate
        strikes = strikes[(strikes >= 0) & (strikes <= time[-1])]
        stride = np.searchsorted(strikes, time, side="right") - 1
        ok = (stride >= 0) & (stride < len(strikes) - 1)
        pct = np.full(n, -1.0)
        pct[ok] = 100.0 * (stride[ok] + (time[ok] - strikes[stride[ok]]) /
                           (strikes[stride[ok] + 1] - strikes[stride[ok]]))
        yield "synth", {k: v[ok] for k, v in angles.items()}, rate, pct[ok] - 100.0 * stride[ok].min(), dims


@pytest.mark.parametrize("source", ["parametric", "synth"])
def test_sprint_late_swing_peak_strain_and_timing(source):
    sources = {name: rest for name, *rest in _sprint_sources()}
    if source not in sources:
        pytest.skip("hamstride.synth not available yet")
    angles, rate, pct, dims = sources[source]
    states = M.muscle_states(angles, rate, dims)
    peaks = {}
    for muscle in M.BIARTICULAR:
        peak, when = late_swing_peaks(states[muscle].strain, pct)
        peaks[muscle] = 100.0 * peak
        # Nagano et al. 2014: BF maximum length at 82.8 +- 1.9 % of the cycle; accepted 75-92 % (issue).
        assert np.all((when >= 75.0) & (when <= 92.0)), (muscle, when)
    # Thelen et al. 2005: BF 9.5 %, ST 8.1 %, SM 7.4 %; Schache et al. 2013: BFlh largest. Accepted ranges (issue).
    assert np.all((peaks["biceps_femoris_long"] >= 6.5) & (peaks["biceps_femoris_long"] <= 12.5)), peaks
    for muscle in ("semitendinosus", "semimembranosus"):
        assert np.all((peaks[muscle] >= 4.0) & (peaks[muscle] <= 11.0)), peaks
        assert np.all(peaks["biceps_femoris_long"] > peaks[muscle])


def test_less_hip_flexion_gives_lower_strain_beyond_the_uncertainty_band():
    # An athlete with 12 deg less late-swing hip flexion on one side: lower peak strain, with the 5-95 % bands of
    # the two sides not overlapping (issue acceptance). Bands: Monte Carlo over geometry and architecture.
    _, pct, normal = sprint_angles(1)
    _, _, reduced = sprint_angles(1, hip_peak_reduction_deg=12.0)
    start = int(np.searchsorted(pct, 50.0))
    stop = len(pct)
    states_normal = M.muscle_states(normal, RATE_HZ, DIMS)
    states_reduced = M.muscle_states(reduced, RATE_HZ, DIMS)
    band_normal = M.monte_carlo_lengths(normal, DIMS, n_samples=200, seed=0)
    band_reduced = M.monte_carlo_lengths(reduced, DIMS, n_samples=200, seed=0)
    for muscle in M.BIARTICULAR:
        i_peak = start + np.argmax(states_normal[muscle].strain[start:stop])
        deficit = np.rad2deg(normal["hip_flexion"][i_peak] - reduced["hip_flexion"][i_peak])
        assert deficit == pytest.approx(12.0, abs=0.6)  # the deficit is there at the stretch peak
        assert states_reduced[muscle].strain[start:stop].max() < states_normal[muscle].strain[start:stop].max()
        low_normal, _ = M.peak_band(band_normal[muscle][0], start, stop)
        _, high_reduced = M.peak_band(band_reduced[muscle][0], start, stop)
        assert high_reduced < low_normal, (muscle, high_reduced, low_normal)


def test_synth_hip_flexion_deficit_is_lower_and_beyond_the_paired_band():
    # hamstride.synth with 12 deg less late-swing hip flexion on the left: lower left peak strain, the paired
    # (same-seed) Monte Carlo difference right - left stays above zero from the 5th percentile, and the two sides'
    # 5-95 % bands do not overlap.
    synth = pytest.importorskip("hamstride.synth")
    _, _, truth = synth.simulate_sprint(synth.SprintSpec(asymmetry_side="left", hip_flexion_deficit_deg=12.0,
                                                         stride_jitter=0.0))
    body = truth.body
    dims = M.MuscleDims(body.pelvis_width_m, body.pelvis_depth_m, body.thigh_length_m, body.shank_length_m)
    windows, bands, nominal = {}, {}, {}
    for side in ("left", "right"):
        angles = {k: np.asarray(truth.angles[side][k]) for k in M.ANGLE_NAMES}
        strikes = np.searchsorted(truth.time_s, np.asarray(truth.foot_strikes_s[side]))
        windows[side] = (int((strikes[0] + strikes[1]) // 2), int(strikes[1]))  # second half of the first stride
        bands[side] = M.monte_carlo_lengths(angles, dims, n_samples=200, seed=0)
        nominal[side] = M.muscle_states(angles, truth.rate_hz, dims)
    for muscle in M.BIARTICULAR:
        peak = {side: nominal[side][muscle].strain[slice(*windows[side])].max() for side in windows}
        assert peak["left"] < peak["right"], muscle
        low, _ = M.peak_difference_band(bands["right"][muscle][0], windows["right"], bands["left"][muscle][0],
                                        windows["left"])
        assert low > 0.0, muscle
        # ... and the per-side 5-95 % bands of the peak do not overlap (issue 4 acceptance)
        _, left_p95 = M.peak_band(bands["left"][muscle][0], *windows["left"])
        right_p5, _ = M.peak_band(bands["right"][muscle][0], *windows["right"])
        assert left_p95 < right_p5, (muscle, left_p95, right_p5)


def test_monte_carlo_shapes_reproducibility_and_band_contains_nominal():
    _, pct, angles = sprint_angles(1)
    n = len(pct)
    a = M.monte_carlo_lengths(angles, DIMS, n_samples=64, seed=5)
    b = M.monte_carlo_lengths(angles, DIMS, n_samples=64, seed=5)
    states = M.muscle_states(angles, RATE_HZ, DIMS)
    start = int(np.searchsorted(pct, 50.0))
    for muscle in M.MUSCLES:
        strain, lopt = a[muscle]
        assert strain.shape == lopt.shape == (64, n)
        np.testing.assert_array_equal(strain, b[muscle][0])
        for samples, nominal in ((strain, states[muscle].strain), (lopt, states[muscle].fibre_length_lopt)):
            low, high = M.peak_band(samples, start, n)
            assert low < nominal[start:].max() < high, muscle
        # l/l_opt is far less certain than strain (Ward's SDs of l_opt are 19-27 % of the mean)
        s_low, s_high = M.peak_band(strain, start, n)
        l_low, l_high = M.peak_band(lopt, start, n)
        if muscle in M.BIARTICULAR:
            assert (l_high - l_low) > (s_high - s_low)
    with pytest.raises(HamstrideError):
        M.peak_band(a["biceps_femoris_long"][0], 10, 10)


def test_fibre_length_never_falls_as_the_unit_lengthens():
    # Constant thickness (Zajac 1989, from memory) has l = sqrt((L - L_ts)^2 + t^2), which would grow again as the
    # unit shortens below its tendon slack length. A slack tendon leaves the fibres at their shortest instead:
    # l = t = l_opt sin(alpha_opt), pennation 90 deg, and l is non-decreasing in L over the whole range.
    arch = M.ARCHITECTURE["semimembranosus"]
    slack = 0.30
    mtu = np.linspace(slack - 0.06, slack + 0.10, 801)
    # unloaded tendon (force 0: tendon at its slack length)
    fibre, alpha = M.fibre_length(mtu, slack, arch.optimal_fibre_length_m, arch.pennation_rad, tendon_force_norm=0.0)
    thickness = arch.optimal_fibre_length_m * np.sin(arch.pennation_rad)
    assert np.all(np.diff(fibre) >= 0.0)
    below = mtu <= slack
    np.testing.assert_allclose(fibre[below], thickness, rtol=1e-15)
    np.testing.assert_allclose(alpha[below], np.pi / 2, rtol=1e-15)
    np.testing.assert_allclose(fibre[~below], np.hypot(mtu[~below] - slack, thickness), rtol=1e-15)
    # loaded at F0 (the default): the tendon is 4.9 % longer (De Groote et al. 2016 tendon strain at F0, worked
    # from its published constants: 0.995 + ln(1.25 / 0.2) / 33.937 - 1 = 0.0490), so the fibres are that much shorter
    loaded, _ = M.fibre_length(mtu, slack, arch.optimal_fibre_length_m, arch.pennation_rad)
    tendon = slack * 1.0490
    assert np.all(np.diff(loaded) >= 0.0)
    np.testing.assert_allclose(loaded[mtu > tendon], np.hypot(mtu[mtu > tendon] - tendon, thickness), rtol=1e-4)


def _stride_windows(pct, n_strides):
    per = len(pct) // n_strides
    return [(k * per + int(np.searchsorted(pct[:per], 50.0)), (k + 1) * per) for k in range(n_strides)]


@pytest.mark.parametrize("margin_m", [M.PEAK_SEARCH_MARGIN_M, 0.0])
def test_monte_carlo_peaks_equal_the_peaks_of_the_full_band(margin_m):
    # The fast per-window search must give exactly the peaks of the full [S, F] band with the same draws; a zero
    # margin searches only the nominal peak frame, so every sample that peaks elsewhere goes through the fallback.
    _, pct, angles = sprint_angles(3)
    windows = _stride_windows(pct, 3)
    full = M.monte_carlo_lengths(angles, DIMS, n_samples=64, seed=3)
    fast = M.monte_carlo_peaks(angles, windows, DIMS, n_samples=64, seed=3, margin_m=margin_m)
    for muscle in M.MUSCLES:
        for j in (0, 1):
            expected = np.stack([np.nanmax(full[muscle][j][:, a:b], axis=1) for a, b in windows], axis=1)
            np.testing.assert_array_equal(fast[muscle][j], expected)


def test_monte_carlo_peaks_find_a_second_peak_outside_the_searched_frames():
    # A window with two stretch humps: a wide one with more hip flexion and a narrow one with more knee extension,
    # tuned so the narrow hump is 0.05 mm longer for the nominal BFlh. Samples that weigh hip against knee
    # differently peak on the wide hump, outside the frames searched with a 0.01 mm margin; the edge check must send
    # them to the full search, so the result equals the full band.
    n = 200
    t = np.linspace(0.0, 1.0, n)
    wide, narrow = np.exp(-((t - 0.3) / 0.08) ** 2), np.exp(-((t - 0.75) / 0.02) ** 2)

    def angles_for(knee_dip_deg):
        return {"hip_flexion": np.deg2rad(70.0 + 8.0 * wide), "hip_adduction": np.zeros(n),
                "hip_rotation": np.zeros(n), "knee_flexion": np.deg2rad(40.0 - 20.0 * wide - knee_dip_deg * narrow)}

    def narrow_minus_wide(knee_dip_deg):
        length = M.musculotendon_length("biceps_femoris_long", *angles_for(knee_dip_deg).values(), DIMS)
        return length[t > 0.5].max() - length[t < 0.5].max()

    angles = angles_for(brentq(lambda d: narrow_minus_wide(d) - 5e-5, 10.0, 39.0))
    full = M.monte_carlo_lengths(angles, DIMS, n_samples=128, seed=1)
    on_wide = t[np.argmax(full["biceps_femoris_long"][0], axis=1)] < 0.5
    assert 10 < on_wide.sum() < 118  # the case under test: samples split between the humps
    fast = M.monte_carlo_peaks(angles, [(0, n)], DIMS, n_samples=128, seed=1, margin_m=1e-5)  # narrow hump only
    for muscle in M.MUSCLES:
        for j in (0, 1):
            np.testing.assert_array_equal(fast[muscle][j][:, 0], np.nanmax(full[muscle][j], axis=1))


def test_monte_carlo_peaks_ignore_missing_frames_and_empty_windows():
    _, pct, angles = sprint_angles(2)
    holed = {k: v.copy() for k, v in angles.items()}
    windows = _stride_windows(pct, 2)
    a, b = windows[0]
    holed["knee_flexion"][a + 5:b - 5] = np.nan  # a gap over most of the first window
    full = M.monte_carlo_lengths(holed, DIMS, n_samples=32, seed=2)
    fast = M.monte_carlo_peaks(holed, windows + [(10, 10)], DIMS, n_samples=32, seed=2)
    for muscle in M.MUSCLES:
        expected = np.stack([np.nanmax(full[muscle][0][:, lo:hi], axis=1) for lo, hi in windows], axis=1)
        np.testing.assert_array_equal(fast[muscle][0][:, :2], expected)
        assert np.all(np.isnan(fast[muscle][0][:, 2]))


def test_muscle_states_fields_and_mirror_use():
    _, _, angles = sprint_angles(1)
    states = M.muscle_states(angles, RATE_HZ, DIMS, body_mass_kg=80.0, height_m=1.80)
    assert set(states) == set(M.MUSCLES)
    st = states["biceps_femoris_long"]
    n = len(angles["hip_flexion"])
    assert st.moment_arms_m.shape == (n, 4) and st.length_m.shape == (n,)
    np.testing.assert_allclose(st.strain, st.length_m / st.upright_length_m - 1.0)
    # by hand: 3.6 % of (47 x 80 x 1.80 + 1285) cm^3 (Handsfield 2014 [M]) x 1.30 (sprinters, Handsfield 2017 [V])
    # / 9.76 cm x 26.8 N/cm^2 x cos 11.6 deg
    assert st.max_isometric_force_n == pytest.approx(
        1.30 * 0.036 * (47.0 * 80.0 * 1.80 + 1285.0) / 9.76 * 26.8 * np.cos(np.deg2rad(11.6)))
    # rigid tendon: fibre velocity = MTU velocity x cos(pennation), in l_opt/s
    np.testing.assert_allclose(st.velocity_lopt_per_s * st.optimal_fibre_length_m,
                               st.velocity_m_per_s * np.cos(st.pennation_rad))


# --------------------------------------------------------------------------------------------------------------
# Practitioner views
# --------------------------------------------------------------------------------------------------------------
def test_muscle_table_and_plot(tmp_path):
    table = M.muscle_table(70.0, 30.0, DIMS)
    assert list(table["muscle"]) == list(M.MUSCLES)
    for column in ("length_m", "strain_pct", "fibre_length_lopt", "tendon_slack_length_m", "hip_flexion_arm_mm",
                   "hip_adduction_arm_mm", "hip_rotation_arm_mm", "knee_flexion_arm_mm"):
        assert column in table.columns
    upright = M.muscle_table(0.0, 0.0, DIMS)
    np.testing.assert_allclose(upright["strain_pct"], 0.0, atol=1e-12)
    bf = table.set_index("muscle").loc["biceps_femoris_long"]
    assert bf["knee_flexion_arm_mm"] == pytest.approx(1000 * M.moment_arms("biceps_femoris_long", 70 * DEG, 0, 0, 30 * DEG, DIMS)[3])
    png = M.plot_moment_arms(tmp_path / "arms.png", DIMS, 70.0, 30.0)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and png.stat().st_size > 10_000
    # the plotted curves pass through the asked posture with the table's sign (they were drawn at 0 deg, sign flipped)
    curves = M.moment_arm_curves(DIMS, 70.0, 30.0)
    rows = table.set_index("muscle")
    for muscle in M.MUSCLES:
        knee = np.interp(30.0, curves["knee"]["angle_deg"], curves["knee"][muscle])
        assert knee == pytest.approx(rows.loc[muscle, "knee_flexion_arm_mm"], rel=1e-3) and knee > 0
        if muscle in M.BIARTICULAR:
            hip = np.interp(70.0, curves["hip"]["angle_deg"], curves["hip"][muscle])
            assert hip == pytest.approx(rows.loc[muscle, "hip_flexion_arm_mm"], rel=1e-3) and hip < 0


def test_muscle_states_of_two_legs_equal_each_leg_alone():
    _, _, right = sprint_angles(2)
    _, _, left = sprint_angles(2, hip_peak_reduction_deg=8.0)
    small = M.MuscleDims.from_height(1.70)
    both = M.muscle_states_of_legs([(right, DIMS), (left, small)], RATE_HZ, body_mass_kg=80.0,
                                   height_m=1.8, tendon_slack_lengths_m={"semitendinosus": 0.25})
    for (angles, dims), together in zip([(right, DIMS), (left, small)], both):
        alone = M.muscle_states(angles, RATE_HZ, dims, body_mass_kg=80.0, height_m=1.8,
                                tendon_slack_lengths_m={"semitendinosus": 0.25})
        assert list(together) == list(M.MUSCLES)
        for muscle in M.MUSCLES:
            a, b = together[muscle], alone[muscle]
            for name in ("length_m", "strain", "fibre_length_lopt", "velocity_m_per_s", "velocity_lopt_per_s",
                         "moment_arms_m", "pennation_rad"):
                np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=f"{muscle} {name}")
            assert (a.tendon_slack_length_m, a.upright_length_m, a.max_isometric_force_n) == (
                b.tendon_slack_length_m, b.upright_length_m, b.max_isometric_force_n)
    assert both[0]["semitendinosus"].tendon_slack_length_m == 0.25
    assert both[0]["biceps_femoris_long"].tendon_slack_length_m == pytest.approx(M.tendon_slack_length("biceps_femoris_long", DIMS), abs=1e-15)
    with pytest.raises(HamstrideError):
        M.muscle_states_of_legs([(right, DIMS), ({k: v[:10] for k, v in left.items()}, small)], RATE_HZ)


def test_band_draws_are_numpy_normal_draws_in_a_fixed_order():
    # The band's draws come from one generator per seed, muscle by muscle: origin and insertion offsets (SD 2 mm
    # per axis), then l_opt, pennation and reference strain as numpy normal(mean, SD) clipped to their ranges.
    # Drawn here the plain way and compared with what the model uses (cached once per process).
    rng = np.random.default_rng(11)
    drawn = dict(M._draw_samples(DIMS, 16, 11, False))
    for muscle in M.MUSCLES:
        arch = M.ARCHITECTURE[muscle]
        nominal = M.muscle_path(muscle, DIMS)
        origin = nominal.origin_m + rng.normal(size=(16, 1, 3)) * M.ATTACHMENT_SD_M
        insertion = nominal.insertion_m + rng.normal(size=(16, 1, 3)) * M.ATTACHMENT_SD_M
        l_opt = np.clip(rng.normal(arch.optimal_fibre_length_m, arch.optimal_fibre_length_sd_m, (16, 1)),
                        0.5 * arch.optimal_fibre_length_m, 1.5 * arch.optimal_fibre_length_m)
        alpha = np.clip(rng.normal(arch.pennation_rad, arch.pennation_sd_rad, (16, 1)), 0.0, np.deg2rad(30.0))
        ref = np.clip(rng.normal(*M.REFERENCE_FIBRE_STRAIN[muscle], (16, 1)), -0.3, 0.4)
        got = drawn[muscle]
        np.testing.assert_array_equal(got.paths.origin_m, origin)
        np.testing.assert_array_equal(got.paths.insertion_m, insertion)
        np.testing.assert_array_equal(got.optimal_fibre_length_m, l_opt)
        np.testing.assert_array_equal(got.pennation_rad, alpha)
        slack = M.tendon_slack_length(muscle, DIMS, geometry=got.paths, optimal_fibre_length_m=l_opt,
                                      pennation_rad=alpha, reference_strain=ref)
        np.testing.assert_allclose(got.slack_length_m, slack, rtol=0, atol=1e-15)
        np.testing.assert_allclose(got.upright_length_m, M.musculotendon_length(muscle, 0, 0, 0, 0, DIMS, got.paths),
                                   rtol=0, atol=1e-15)
