"""JCS angles against scipy.spatial.transform and anatomical sign checks on hand-built landmarks."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from hamstride.angles import ANGLE_NAMES, jcs_angles, joint_angles
from hamstride.landmarks import Landmarks
from hamstride.segments import build_body, hip_joint_centre, pelvis_frames


def _wrap(a):
    return (a + np.pi) % (2 * np.pi) - np.pi


def test_jcs_matches_scipy_intrinsic_zxy_for_1000_random_rotations():
    # Reference: scipy Rotation.as_euler("ZXY") (upper case = intrinsic), the Grood & Suntay JCS sequence
    # e1 = proximal Z, e2 floating X, e3 = distal Y (references.md, Joint coordinate systems).
    prox = Rotation.random(1000, random_state=11).as_matrix()
    dist = Rotation.random(1000, random_state=12).as_matrix()
    a_z, a_x, a_y = jcs_angles(prox, dist)
    relative = np.einsum("fji,fjk->fik", prox, dist)
    ref = Rotation.from_matrix(relative).as_euler("ZXY")
    ours = np.stack([a_z, a_x, a_y], axis=1)
    assert np.max(np.abs(_wrap(ours - ref))) < 1e-9  # issue 3 acceptance: within 1e-9 rad


def test_jcs_recovers_known_cardan_angles():
    # Compose R = Rz(a) Rx(b) Ry(c) with scipy and recover (a, b, c).
    rng = np.random.default_rng(3)
    angles = np.column_stack([rng.uniform(-3, 3, 200), rng.uniform(-1.5, 1.5, 200), rng.uniform(-3, 3, 200)])
    dist = Rotation.from_euler("ZXY", angles).as_matrix()
    prox = np.broadcast_to(np.eye(3), dist.shape)
    got = np.stack(jcs_angles(prox, dist), axis=1)
    assert np.allclose(got, angles, atol=1e-12)


# ---------------------------------------------------------------------- hand-built standing athlete
F = 5
PELVIS = {  # lab: x forward, y left, z up (DEVELOPERS.md); metres, invented standing posture
    "right_asis": (0.0, -0.125, 1.0), "left_asis": (0.0, 0.125, 1.0),
    "right_psis": (-0.16, -0.05, 1.0), "left_psis": (-0.16, 0.05, 1.0),
}


def _hip_centre(side):
    p = {k: np.array([v], float) for k, v in PELVIS.items()}
    pelvis = pelvis_frames(p["left_asis"], p["right_asis"], p["left_psis"], p["right_psis"])
    return hip_joint_centre(pelvis, 0.25, 0.16, side)[0]  # PW 0.25 m, PD 0.16 m from PELVIS above


def _standing_limb(side: str) -> dict[str, np.ndarray]:
    """Knee 0.45 m and ankle 0.85 m straight below the hip centre, foot flat pointing forward (pelvis level)."""
    lat = 1 if side == "left" else -1  # lateral is +y on the left, -y on the right
    hjc = _hip_centre(side)
    return {
        "knee": hjc - np.array([0.0, 0.0, 0.45]), "ankle": hjc - np.array([0.0, 0.0, 0.85]),
        "lat_dir": np.array([0.0, lat, 0.0]),
    }


def _landmarks(limb_override: dict | None = None) -> Landmarks:
    points = {k: np.tile(np.array(v, float), (F, 1)) for k, v in PELVIS.items()}
    for side in ("left", "right"):
        limb = _standing_limb(side)
        if limb_override and side in limb_override:
            limb.update(limb_override[side])
        knee, ankle, lat = limb["knee"], limb["ankle"], limb["lat_dir"]
        knee_lat = limb.get("knee_lat_dir", lat)
        points[f"{side}_lateral_epicondyle"] = knee + 0.05 * knee_lat
        points[f"{side}_medial_epicondyle"] = knee - 0.05 * knee_lat
        points[f"{side}_lateral_malleolus"] = ankle + 0.035 * lat
        points[f"{side}_medial_malleolus"] = ankle - 0.035 * lat
        foot_fwd = limb.get("foot_fwd", np.array([1.0, 0.0, 0.0]))
        heel = ankle + np.array([-0.05, 0.0, -0.05])
        points[f"{side}_heel"] = heel
        points[f"{side}_first_metatarsal"] = heel + 0.18 * foot_fwd - 0.03 * lat
        points[f"{side}_fifth_metatarsal"] = heel + 0.18 * foot_fwd + 0.03 * lat
        for k in list(points):
            if k.startswith(side) and points[k].ndim == 1:
                points[k] = np.tile(points[k], (F, 1))
    return Landmarks(trial="hand-built", rate_hz=200.0, points=points)


def _angles(override=None):
    return joint_angles(build_body(_landmarks(override)))


def _assert_pure(ang, moving: str, theta: float, still: tuple[str, ...]) -> None:
    """A pure motion: ``moving`` equals theta and every angle in ``still`` stays zero (to 1e-9 rad)."""
    assert np.allclose(ang[moving], theta, atol=1e-9)
    for name in still:
        assert np.allclose(ang[name], 0.0, atol=1e-9), name


@pytest.mark.parametrize("side", ["left", "right"])
def test_pure_hip_flexion_is_positive_on_both_sides(side):
    # Anatomy: hip flexion moves the knee forward (+x); sign convention hip flexion + (references.md, ISB).
    hjc = _hip_centre(side)
    theta = np.radians(30)
    knee = hjc + 0.45 * np.array([np.sin(theta), 0.0, -np.cos(theta)])
    lat = _standing_limb(side)["lat_dir"]
    ang = _angles({side: {"knee": knee, "ankle": knee + 0.4 * np.array([np.sin(theta), 0, -np.cos(theta)]),
                          "lat_dir": lat}})[side]
    _assert_pure(ang, "hip_flexion", theta, ("hip_adduction", "hip_rotation", "knee_flexion"))


@pytest.mark.parametrize("side", ["left", "right"])
def test_pure_hip_adduction_is_positive_on_both_sides(side):
    # Anatomy: adduction moves the knee toward the midline: +y for the right leg, -y for the left (y = athlete's left).
    hjc = _hip_centre(side)
    theta = np.radians(10)
    medial = 1.0 if side == "right" else -1.0
    down = np.array([0.0, medial * np.sin(theta), -np.cos(theta)])
    lat_dir = np.array([0.0, -medial * np.cos(theta), -medial * np.sin(theta)])
    knee = hjc + 0.45 * down
    ang = _angles({side: {"knee": knee, "ankle": knee + 0.4 * down, "lat_dir": lat_dir}})[side]
    _assert_pure(ang, "hip_adduction", theta, ("hip_flexion", "hip_rotation"))


@pytest.mark.parametrize("side", ["left", "right"])
def test_pure_hip_internal_rotation_is_positive_on_both_sides(side):
    # Anatomy: internal rotation turns the front of the thigh (and the whole leg) toward the midline, so the
    # lateral epicondyle moves forward on both sides.
    theta = np.radians(15)
    lat0 = _standing_limb(side)["lat_dir"]
    lat = np.cos(theta) * lat0 + np.sin(theta) * np.array([1.0, 0.0, 0.0])
    fwd = np.cos(theta) * np.array([1.0, 0.0, 0.0]) - np.sin(theta) * lat0
    ang = _angles({side: {"lat_dir": lat, "foot_fwd": fwd}})[side]
    _assert_pure(ang, "hip_rotation", theta, ("hip_flexion", "hip_adduction", "knee_rotation"))


@pytest.mark.parametrize("side", ["left", "right"])
def test_pure_knee_flexion_is_positive_on_both_sides(side):
    # Anatomy: knee flexion moves the ankle behind the knee (-x); sign convention knee flexion + (references.md).
    limb = _standing_limb(side)
    theta = np.radians(60)
    ankle = limb["knee"] + 0.4 * np.array([-np.sin(theta), 0.0, -np.cos(theta)])
    ang = _angles({side: {"ankle": ankle}})[side]
    _assert_pure(ang, "knee_flexion", theta, ("hip_flexion", "knee_adduction", "knee_rotation"))


@pytest.mark.parametrize("side", ["left", "right"])
def test_ankle_dorsiflexion_is_positive_when_the_toes_rise(side):
    # Anatomy: dorsiflexion lifts the forefoot; sign convention ankle dorsiflexion + (references.md).
    theta = np.radians(20)
    neutral = _angles()[side]["ankle_dorsiflexion"]
    fwd = np.array([np.cos(theta), 0.0, np.sin(theta)])
    raised = _angles({side: {"foot_fwd": fwd}})[side]["ankle_dorsiflexion"]
    assert np.allclose(raised - neutral, theta, atol=1e-9)
    assert np.allclose(neutral, 0.0, atol=1e-9)  # plantar line horizontal, shank vertical


def test_standing_posture_gives_zero_angles_and_all_names():
    ang = _angles()
    for side in ("left", "right"):
        assert set(ang[side]) == set(ANGLE_NAMES)
        for name in ANGLE_NAMES:
            assert np.allclose(ang.angle(side, name), 0.0, atol=1e-9), (side, name)
            assert ang[side][name].shape == (F,)


# ---------------------------------------------------------------------- synthetic sprint with known truth
def _synth_sprint(**body):
    import dataclasses

    from hamstride.synth import AthleteBody, SprintSpec, simulate_sprint

    athlete = dataclasses.replace(AthleteBody.from_height(1.80, 75.0, "male"), **body)
    _, _, truth = simulate_sprint(SprintSpec(noise_mm=0.0, n_gaps=0, seed=3, body=athlete))
    return truth


def test_noise_free_synthetic_sprint_angles_reproduce_the_truth_within_half_a_degree():
    # Truth: hamstride.synth builds ISB frames first and places landmarks in them (issue 3: within 0.5 deg). Here
    # the athlete's hip centre is where Harrington et al. 2007 puts it (offset 0), so this checks the frames and
    # the JCS given the pipeline's hip model; the next test lets the hip centre differ, as a real one does.
    truth = _synth_sprint(hip_centre_offset_m=(0.0, 0.0, 0.0))
    lm = Landmarks(trial="synth", rate_hz=truth.rate_hz, points=dict(truth.landmarks_lab))
    ang = joint_angles(build_body(lm))
    for side in ("left", "right"):
        for name, expected in truth.angles[side].items():
            assert np.max(np.abs(ang[side][name] - expected)) < np.radians(0.5), (side, name)
        assert np.ptp(truth.angles[side]["knee_flexion"]) > np.radians(90)  # a real sprint swing was compared


@pytest.mark.parametrize("offset_m", [(-0.005, -0.004, 0.003), (0.010, 0.0, -0.006)])
def test_noise_free_angles_with_a_true_hip_centre_off_the_regression(offset_m):
    # The true hip centre 7-12 mm from the Harrington et al. 2007 estimate (its leave-one-out error is about
    # 5/4/3 mm, a CT study found 12.3 +/- 5.9 mm; Mantovani et al. 2016 [V, references.md]). Tilting the thigh's
    # long axis by an offset d over the thigh length L moves hip angles by up to atan(d / L): 12 mm over 0.43 m is
    # 1.6 deg (geometry); knee and ankle angles change less. Within 2 deg everywhere, and not exact (not circular).
    truth = _synth_sprint(hip_centre_offset_m=offset_m)
    lm = Landmarks(trial="synth", rate_hz=truth.rate_hz, points=dict(truth.landmarks_lab))
    ang = joint_angles(build_body(lm))
    bound = np.arctan(np.linalg.norm(offset_m) / truth.body.thigh_length_m)
    for side in ("left", "right"):
        errors = {name: np.max(np.abs(ang[side][name] - expected)) for name, expected in truth.angles[side].items()}
        assert max(errors.values()) < min(1.05 * bound, np.radians(2.0)), (side, np.degrees(list(errors.values())))
        assert max(errors["hip_flexion"], errors["hip_adduction"]) > 0.2 * bound  # the offset shows


def test_noisy_synthetic_sprint_with_medial_markers_from_a_static_trial():
    # 0.5 mm marker noise, medial markers only in the static trial, clusters in both; after reconstruction,
    # residual-analysis filtering and the JCS, every angle stays within 1 deg RMS of the truth (common practice:
    # marker-based sprint kinematics are quoted to about a degree).
    from hamstride.segments import calibrate
    from hamstride.signal import smooth_landmarks
    from hamstride.synth import simulate_static

    rng = np.random.default_rng(17)
    truth = _synth_sprint()
    _, _, still = simulate_static(noise_mm=0.0)

    def measured(tr, keep_medial):
        pts = {k: v + rng.normal(0, 5e-4, v.shape) for k, v in tr.landmarks_lab.items()
               if keep_medial or "medial" not in k}
        clusters = {f"{s}_{seg}_cluster": np.stack([tr.markers_lab[f"{s[0]}.{seg}.{c}"] for c in "abc"], axis=1)
                    for s in ("left", "right") for seg in ("thigh", "shank")}
        clusters = {k: v + rng.normal(0, 5e-4, v.shape) for k, v in clusters.items()}
        return Landmarks(trial="synth", rate_hz=tr.rate_hz, points=pts, clusters=clusters)

    cal = calibrate(measured(still, keep_medial=True))
    lm, info = smooth_landmarks(measured(truth, keep_medial=False))
    assert info.method == "residual" and 8.0 < info.cutoff_hz < 30.0  # typical sprint cutoffs 10-20 Hz [M]
    # synth puts the hip centre on the Harrington pelvis-width form, so compare with that form
    body = build_body(lm, calibration=cal, hip_method="harrington_pw")
    assert body.hip_method == "harrington_pw"
    leg = np.linalg.norm(still.landmarks_lab["right_asis"] - still.landmarks_lab["right_medial_malleolus"], axis=1)
    assert cal.leg_length_m == pytest.approx(np.median(leg), abs=0.002)  # ASIS -> medial malleolus, Harrington 2007
    assert build_body(lm, calibration=cal).hip_method == "harrington_full"
    ang = joint_angles(body)
    for side in ("left", "right"):
        for name, expected in truth.angles[side].items():
            rms = np.sqrt(np.mean((ang[side][name] - expected) ** 2))
            assert rms < np.radians(1.0), (side, name, np.degrees(rms))
