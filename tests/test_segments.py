"""Segment frames, hip joint centre regressions, static-trial rigid-fit reconstruction, missing-landmark errors."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from hamstride.angles import joint_angles
from hamstride.errors import ConfigError, LandmarkError, PlausibilityError
from hamstride.landmarks import Landmarks
from hamstride.segments import (
    Frames,
    build_body,
    calibrate,
    hip_centre_local_mm,
    hip_joint_centre,
    pelvis_frames,
    reconstruct_missing,
    rigid_fit,
)

SIDES = ("left", "right")


# ---------------------------------------------------------------------- hip joint centre by hand
@pytest.mark.parametrize(
    "method, leg, expected_mm",
    [
        # Harrington et al. 2007 full form, PW = 250, PD = 160, LL = 900 mm, by hand:
        # x = -0.24*160 - 9.9 = -48.3; y = -0.16*250 - 0.04*900 - 7.1 = -83.1; z = 0.28*160 + 0.16*250 + 7.9 = 92.7
        ("harrington", 900.0, (-48.3, -83.1, 92.7)),
        # Harrington et al. 2007 PW-only: x = -48.3; y = -0.30*250 - 10.9 = -85.9; z = 0.33*250 + 7.3 = 89.8
        ("harrington", None, (-48.3, -85.9, 89.8)),
        ("harrington_pw", 900.0, (-48.3, -85.9, 89.8)),
        # Bell et al. 1990: x = -0.19*250 = -47.5; y = -0.30*250 = -75; z = 0.36*250 = 90
        ("bell", None, (-47.5, -75.0, 90.0)),
    ],
)
def test_hip_centre_regressions_by_hand(method, leg, expected_mm):
    right, used = hip_centre_local_mm(250.0, 160.0, "right", method, leg)
    left, _ = hip_centre_local_mm(250.0, 160.0, "left", method, leg)
    assert np.allclose(right, expected_mm, atol=1e-9)
    assert np.allclose(left, np.array(expected_mm) * [1, 1, -1], atol=1e-9)  # z negated on the left (references.md)
    assert used == ("harrington_full" if method == "harrington" and leg else method if method != "harrington"
                    else "harrington_pw")


def test_hip_joint_centre_in_lab_follows_a_rotated_translated_pelvis():
    rot = Rotation.from_euler("ZXY", [0.3, -0.2, 0.5]).as_matrix()
    origin = np.array([[1.0, 2.0, 0.9]])
    pelvis = Frames(origin, rot[None])
    got = hip_joint_centre(pelvis, 0.25, 0.16, "right", "harrington", leg_length_m=0.9)
    expected = origin[0] + rot @ (np.array([-48.3, -83.1, 92.7]) / 1000)  # values by hand above
    assert np.allclose(got[0], expected, atol=1e-12)


def test_unknown_hip_method_is_config_error():
    with pytest.raises(ConfigError, match="hip joint centre method"):
        hip_centre_local_mm(250, 160, "right", "guess")


# ---------------------------------------------------------------------- synthetic athlete from known angles
PW, PD = 0.25, 0.16
THIGH, SHANK = 0.42, 0.41
# Segment-local marker positions (ISB axes: X anterior, Y proximal, Z right; metres), right side; z flips on the left.
# Four-marker rigid plates on the lateral side of the distal thigh and of the shank (about 10 x 12 cm).
THIGH_CLUSTER = np.array([[0.06, -0.22, 0.075], [-0.04, -0.24, 0.08], [0.05, -0.34, 0.07], [-0.04, -0.35, 0.07]])
SHANK_CLUSTER = np.array([[0.05, -0.10, 0.06], [-0.04, -0.11, 0.065], [0.04, -0.22, 0.055], [-0.04, -0.23, 0.05]])
# Pelvis facing +x in the lab (x forward, y left, z up): ISB X -> +x, Y -> +z, Z -> -y (columns).
LAB_FROM_ISB = np.array([[1.0, 0, 0], [0, 0, -1], [0, 1, 0]])


def _mirror(local, side):
    return local * np.array([1, 1, 1 if side == "right" else -1])


def _place(frames_rot, origin, local):
    placed = np.einsum("fij,...j->f...i", frames_rot, local)
    return placed + (origin[:, None, :] if placed.ndim == 3 else origin)


def synthetic_trial(angles: dict, n: int, rng, pelvis_rot=None, run_m: float = 5.0) -> tuple[Landmarks, dict]:
    """Forward kinematics from ISB frames composed with scipy (intrinsic Z-X-Y = JCS): returns landmarks and the
    thigh / shank axes used. ``angles[side]`` = (hip flex, add, int rot, knee flex, ankle dorsiflexion) [n] rad."""
    if pelvis_rot is None:  # pelvis tilt, obliquity and rotation within +-20 deg of facing +x
        pelvis_rot = LAB_FROM_ISB @ Rotation.from_euler("ZXY", rng.uniform(-0.35, 0.35, (n, 3))).as_matrix()
    origin = np.column_stack([np.linspace(0, run_m, n), np.zeros(n), np.full(n, 1.0)])
    pts = {}
    for side in SIDES:
        z = 1.0 if side == "right" else -1.0
        pts[f"{side}_asis"] = _place(pelvis_rot, origin, np.array([0, 0, z * PW / 2]))
        pts[f"{side}_psis"] = _place(pelvis_rot, origin, np.array([-PD, 0.0, z * 0.045]))
    truth = {}
    for side in SIDES:
        m = 1.0 if side == "right" else -1.0
        hf, ha, hr, kf, ad = angles[side]
        hjc_local, _ = hip_centre_local_mm(PW * 1e3, PD * 1e3, side)
        hjc = _place(pelvis_rot, origin, hjc_local / 1e3)
        thigh = pelvis_rot @ Rotation.from_euler("ZXY", np.column_stack([hf, m * ha, m * hr])).as_matrix()
        knee = _place(thigh, hjc, np.array([0, -THIGH, 0]))
        pts[f"{side}_lateral_epicondyle"] = _place(thigh, knee, _mirror(np.array([0, 0, 0.05]), side))
        pts[f"{side}_medial_epicondyle"] = _place(thigh, knee, _mirror(np.array([0, 0, -0.05]), side))
        thigh_cluster = _place(thigh, hjc, _mirror(THIGH_CLUSTER, side))
        shank = thigh @ Rotation.from_euler("Z", -kf[:, None]).as_matrix()
        ankle = _place(shank, knee, np.array([0, -SHANK, 0]))
        pts[f"{side}_lateral_malleolus"] = _place(shank, ankle, _mirror(np.array([0, 0, 0.035]), side))
        pts[f"{side}_medial_malleolus"] = _place(shank, ankle, _mirror(np.array([0, 0, -0.035]), side))
        shank_cluster = _place(shank, knee, _mirror(SHANK_CLUSTER, side))
        foot = shank @ Rotation.from_euler("Z", ad[:, None]).as_matrix()
        heel = _place(foot, ankle, np.array([-0.05, -0.04, 0]))
        pts[f"{side}_heel"] = heel
        pts[f"{side}_first_metatarsal"] = _place(foot, heel, _mirror(np.array([0.19, 0, -0.03]), side))
        pts[f"{side}_fifth_metatarsal"] = _place(foot, heel, _mirror(np.array([0.19, 0, 0.03]), side))
        pts[f"{side}_toe_tip"] = _place(foot, heel, np.array([0.26, 0, 0]))
        truth[side] = {"thigh": thigh, "shank": shank, "foot": foot, "hjc": hjc, "knee": knee, "ankle": ankle,
                       "thigh_cluster": thigh_cluster, "shank_cluster": shank_cluster}
    clusters = {f"{s}_{seg}_cluster": truth[s][f"{seg}_cluster"] for s in SIDES for seg in ("thigh", "shank")}
    return Landmarks(trial="synthetic", rate_hz=200.0, points=pts, clusters=clusters), truth


def _random_angles(n, rng):
    # Sprint-like ranges (references.md, typical sprint kinematics [M]): hip -20..80 deg, knee 0..130 deg.
    d = np.radians
    return {s: (rng.uniform(d(-20), d(80), n), rng.uniform(d(-15), d(15), n), rng.uniform(d(-20), d(20), n),
                rng.uniform(d(0), d(130), n), rng.uniform(d(-30), d(25), n)) for s in SIDES}


def test_frames_joint_centres_and_angles_recover_the_forward_kinematics():
    rng = np.random.default_rng(21)
    n = 400
    ang = _random_angles(n, rng)
    lm, truth = synthetic_trial(ang, n, rng)
    body = build_body(lm)
    assert body.hip_method == "harrington_pw"
    for side in SIDES:
        assert np.allclose(body.hip_centre[side], truth[side]["hjc"], atol=1e-9)
        assert np.allclose(body.knee_centre[side], truth[side]["knee"], atol=1e-9)
        assert np.allclose(body.ankle_centre[side], truth[side]["ankle"], atol=1e-9)
        assert np.allclose(body.thigh[side].axes, truth[side]["thigh"], atol=1e-9)
        assert np.allclose(body.shank[side].axes, truth[side]["shank"], atol=1e-9)
        # foot axes: X along the plantar line (parallel to foot X here), Z right
        assert np.allclose(body.foot[side].axes, truth[side]["foot"], atol=1e-9)
        for seg in (body.pelvis, body.thigh[side], body.shank[side], body.foot[side]):
            assert np.allclose(np.einsum("fji,fjk->fik", seg.axes, seg.axes), np.eye(3), atol=1e-12)
            assert np.allclose(np.linalg.det(seg.axes), 1.0)
        angles = joint_angles(body)[side]
        hf, ha, hr, kf, ad = ang[side]
        assert np.allclose(angles["hip_flexion"], hf, atol=1e-9)
        assert np.allclose(angles["hip_adduction"], ha, atol=1e-9)
        assert np.allclose(angles["hip_rotation"], hr, atol=1e-9)
        assert np.allclose(angles["knee_flexion"], kf, atol=1e-9)
        assert np.allclose(angles["ankle_dorsiflexion"], ad, atol=1e-9)
        assert np.allclose(angles["knee_adduction"], 0, atol=1e-9)
    assert body.dims.pelvis_width_m == pytest.approx(PW)
    assert body.dims.pelvis_depth_m == pytest.approx(PD)
    assert body.dims.thigh_length_m["right"] == pytest.approx(THIGH)
    assert body.dims.foot_length_m["left"] == pytest.approx(0.26)  # heel -> toe tip (de Leva 1996 endpoints)


def test_toe_tip_estimated_from_metatarsals_when_absent():
    rng = np.random.default_rng(2)
    lm, _ = synthetic_trial(_random_angles(20, rng), 20, rng)
    points = {k: v for k, v in lm.points.items() if not k.endswith("toe_tip")}
    body = build_body(lm.replace(points=points))
    # heel -> mid-metatarsals is 0.19 m; the metatarsal heads at 0.72 of foot length (from memory) give 0.264 m
    assert body.dims.foot_length_m["right"] == pytest.approx(0.19 / 0.72)


# ---------------------------------------------------------------------- static calibration, rigid fit
def test_rigid_fit_recovers_a_known_motion_and_needs_three_markers():
    rng = np.random.default_rng(5)
    ref = rng.normal(size=(5, 3)) * 0.1
    rot = Rotation.random(50, random_state=rng).as_matrix()
    trans = rng.normal(size=(50, 3))
    obs = np.einsum("fij,kj->fki", rot, ref) + trans[:, None]
    w = np.ones((50, 5))
    obs[10, 1:] = np.nan  # one marker only: no fit
    obs[11, 0] = np.nan  # four markers: fit
    r, t = rigid_fit(ref, obs, w)
    good = np.ones(50, bool)
    good[10] = False
    assert np.allclose(r[good], rot[good], atol=1e-12) and np.allclose(t[good], trans[good], atol=1e-12)
    assert np.isnan(r[10]).all() and np.isnan(t[10]).all()
    assert np.allclose(np.linalg.det(r[good]), 1.0)


def test_rigid_fit_reconstruction_of_removed_medial_epicondyle_within_1_mm_rms_at_0_5_mm_noise():
    # Issue 3 acceptance: <= 1 mm RMS at 0.5 mm noise (noise: 0.5 mm standard deviation per coordinate on every
    # marker, static and dynamic trials alike).
    rng = np.random.default_rng(13)
    noise = 0.0005
    still = {s: tuple(np.zeros(60) for _ in range(5)) for s in SIDES}
    static, _ = synthetic_trial(still, 60, rng, pelvis_rot=np.broadcast_to(LAB_FROM_ISB, (60, 3, 3)), run_m=0.0)
    dynamic, truth = synthetic_trial(_random_angles(300, rng), 300, rng)

    def noisy(lm):
        return lm.replace(points={k: v + rng.normal(0, noise, v.shape) for k, v in lm.points.items()},
                          clusters={k: v + rng.normal(0, noise, v.shape) for k, v in lm.clusters.items()})

    cal = calibrate(noisy(static))
    measured = noisy(dynamic)
    without = {k: v for k, v in measured.points.items() if "medial" not in k}
    rebuilt = reconstruct_missing(measured.replace(points=without), cal)
    for side in SIDES:
        for name in ("medial_epicondyle", "medial_malleolus"):
            err = rebuilt.points[f"{side}_{name}"] - dynamic.points[f"{side}_{name}"]
            rms = np.sqrt(np.mean(np.sum(err ** 2, axis=1)))
            assert rms <= 0.001, (side, name, rms)
        # measured landmarks are left as they were
        assert np.array_equal(rebuilt.points[f"{side}_lateral_epicondyle"],
                              measured.points[f"{side}_lateral_epicondyle"])
    # leg length ASIS -> medial malleolus from the static trial (Harrington 2007), here straight standing
    assert cal.leg_length_m == pytest.approx(float(np.linalg.norm(
        static.points["right_asis"][0] - static.points["right_medial_malleolus"][0])), abs=0.001)
    body = build_body(measured.replace(points=without), calibration=cal)
    assert body.hip_method == "harrington_full"


def test_reconstruction_without_a_cluster_cannot_invent_the_marker():
    rng = np.random.default_rng(4)
    still = {s: tuple(np.zeros(10) for _ in range(5)) for s in SIDES}
    static, _ = synthetic_trial(still, 10, rng)
    no_clusters = static.replace(clusters={})
    cal = calibrate(no_clusters)
    dynamic, _ = synthetic_trial(_random_angles(10, rng), 10, rng)
    lm = dynamic.replace(points={k: v for k, v in dynamic.points.items() if k != "right_medial_epicondyle"},
                         clusters={})
    with pytest.raises(LandmarkError, match="right medial epicondyle is not in this trial"):
        build_body(lm, calibration=cal)


# ---------------------------------------------------------------------- missing and swapped landmarks
def test_landmark_missing_in_over_20_percent_of_frames_fails_naming_it():
    rng = np.random.default_rng(6)
    lm, _ = synthetic_trial(_random_angles(100, rng), 100, rng)
    points = dict(lm.points)
    lat = points["right_lateral_epicondyle"].copy()
    lat[10:50] = np.nan  # 40 %
    points["right_lateral_epicondyle"] = lat
    with pytest.raises(LandmarkError) as err:
        build_body(lm.replace(points=points))
    msg = str(err.value)
    assert "right lateral epicondyle" in msg and "40%" in msg and "synthetic" in msg and "static trial" in msg
    assert err.value.code == "landmark_missing"
    # 15 % missing is allowed: those frames are NaN, the rest are computed
    lat = lm.points["right_lateral_epicondyle"].copy()
    lat[10:25] = np.nan
    points["right_lateral_epicondyle"] = lat
    body = build_body(lm.replace(points=points))
    assert np.isnan(body.knee_centre["right"][10:25]).all() and np.isfinite(body.knee_centre["right"][25:]).all()


def test_swapped_asis_labels_are_reported():
    rng = np.random.default_rng(8)
    lm, _ = synthetic_trial(_random_angles(30, rng), 30, rng, pelvis_rot=np.broadcast_to(LAB_FROM_ISB, (30, 3, 3)))
    p = dict(lm.points)
    p["left_asis"], p["right_asis"] = p["right_asis"], p["left_asis"]
    p["left_psis"], p["right_psis"] = p["right_psis"], p["left_psis"]
    with pytest.raises(PlausibilityError, match="ASIS"):
        build_body(lm.replace(points=p))


def test_swapped_epicondyle_labels_are_reported():
    rng = np.random.default_rng(9)
    lm, _ = synthetic_trial(_random_angles(30, rng), 30, rng, pelvis_rot=np.broadcast_to(LAB_FROM_ISB, (30, 3, 3)))
    p = dict(lm.points)
    p["left_lateral_epicondyle"], p["left_medial_epicondyle"] = p["left_medial_epicondyle"], p[
        "left_lateral_epicondyle"]
    with pytest.raises(PlausibilityError, match="left lateral and medial epicondyle"):
        build_body(lm.replace(points=p))


def test_pelvis_frame_standing_is_the_lab_frame_rotated_to_isb():
    # Level pelvis facing +x (lab: x forward, y left, z up): ISB X anterior = +x, Y up = +z, Z right = -y.
    p = {"left_asis": [[0, 0.125, 1]], "right_asis": [[0, -0.125, 1]], "left_psis": [[-0.16, 0.05, 1]],
         "right_psis": [[-0.16, -0.05, 1]]}
    f = pelvis_frames(*(np.array(p[k], float) for k in ("left_asis", "right_asis", "left_psis", "right_psis")))
    assert np.allclose(f.axes[0], [[1, 0, 0], [0, 0, -1], [0, 1, 0]])
    assert np.allclose(f.origin[0], [0, 0, 1])
    pt = np.array([[0.1, 0.2, 1.3]])
    assert np.allclose(f.to_lab(f.to_local(pt)), pt)


def test_long_gap_in_a_present_landmark_is_bridged_from_its_segment():
    # Long gaps are better filled from the segment's other markers (Howarth & Callaghan 2010): noise-free, the
    # rigid fit is exact; measured frames are untouched.
    rng = np.random.default_rng(12)
    still = {s: tuple(np.zeros(20) for _ in range(5)) for s in SIDES}
    static, _ = synthetic_trial(still, 20, rng, pelvis_rot=np.broadcast_to(LAB_FROM_ISB, (20, 3, 3)), run_m=0.0)
    dynamic, _ = synthetic_trial(_random_angles(200, rng), 200, rng)
    p = dict(dynamic.points)
    for name in ("right_heel", "left_psis"):
        p[name] = p[name].copy()
        p[name][50:150] = np.nan  # 100 frames, far beyond the spline's 10
    rebuilt = reconstruct_missing(dynamic.replace(points=p), calibrate(static))
    for name in ("right_heel", "left_psis"):
        assert np.allclose(rebuilt.points[name], dynamic.points[name], atol=1e-9)
