"""Acceptance of the force model (issue 14) on generated sprints run through the whole pipeline.

Sources beside each check; [V] verified, [M] from memory (see ../shared/references.md).
"""
from __future__ import annotations

import numpy as np
import pytest

from hamstride import synth
from hamstride.pipeline import AthleteInfo, analyse_trial

BICEPS, SEMITEND, SEMIMEM, SHORT = "biceps_femoris_long", "semitendinosus", "semimembranosus", "biceps_femoris_short"


@pytest.fixture(scope="module")
def sprints(tmp_path_factory):
    """Generated 8 and 9 m/s sprints (75 kg, 1.80 m) through the pipeline, and the 9 m/s one at 60 and 90 kg."""
    folder = tmp_path_factory.mktemp("forces")
    out = {}
    for speed in (8.0, 9.0):
        path = folder / f"sprint_{speed:.0f}.c3d"
        synth.write_sprint_trial(path, synth.SprintSpec(speed_m_s=speed, seed=3))
        for mass in ((60.0, 75.0, 90.0) if speed == 9.0 else (75.0,)):
            out[speed, mass] = analyse_trial(path, athlete=AthleteInfo(body_mass_kg=mass, height_m=1.80))
    return out


def _per_muscle(result, column):
    return result.strides.groupby("muscle")[column].mean()


def test_peak_forces_scale_with_body_mass(sprints):
    # Same motion, 60 vs 90 kg: the swing demand scales with mass (de Leva 1996 fractions of body mass) and so does
    # the strength (Handsfield et al. 2014: volume ~ mass x height [M]); expected ratio about 1.5 (issue 14).
    light, heavy = (_per_muscle(sprints[9.0, m], "peak_force_n") for m in (60.0, 90.0))
    for muscle in (BICEPS, SEMITEND, SEMIMEM):
        assert 1.35 < heavy[muscle] / light[muscle] < 1.6, muscle


def test_published_order_of_peak_force_strain_and_lengthening_velocity(sprints):
    # Schache et al. 2012 (MSSE 44:647) [V, direction only]: SM the highest peak force, BFlh the largest peak strain,
    # ST the greatest (musculotendon) lengthening velocity.
    for speed in (8.0, 9.0):
        r = sprints[speed, 75.0]
        force, strain = _per_muscle(r, "peak_force_n"), _per_muscle(r, "peak_strain_pct")
        assert force.idxmax() == SEMIMEM
        assert strain[[BICEPS, SEMITEND, SEMIMEM]].idxmax() == BICEPS
        curves = r.curves
        # musculotendon velocity (m/s) from the length curve: d length / d time over each stride
        velocity = {}
        for muscle in (BICEPS, SEMITEND, SEMIMEM):
            c = curves[curves.muscle == muscle]
            peaks = []
            for (side, stride), g in c.groupby(["side", "stride"]):
                row = r.strides[(r.strides.side == side) & (r.strides.stride == stride)].iloc[0]
                dt = row.stride_time_s / 100.0
                peaks.append(np.max(np.diff(g.length_m.to_numpy()) / dt))
            velocity[muscle] = np.mean(peaks)
        assert max(velocity, key=velocity.get) == SEMITEND


def test_peak_force_in_terminal_swing_and_work_only_in_swing_rising_with_speed(sprints):
    # Schache et al. 2012: peak force in terminal swing [V]; Nagano et al. 2014 (J Sports Sci 32:1722): peak BF
    # force at 80.5 +- 2.9 % of the cycle [V]; Chumanov et al. 2011 (MSSE 43:525): biarticular negative work in swing
    # only, rising with speed [V].
    for speed in (8.0, 9.0):
        c = sprints[speed, 75.0].curves
        for muscle in (BICEPS, SEMITEND, SEMIMEM):
            m = c[c.muscle == muscle]
            at_peak = m.loc[m.groupby(["side", "stride"]).force_n.idxmax(), "pct"]
            assert (at_peak > 70.0).all() and (at_peak < 100.0).all(), (speed, muscle)
            toe_off = sprints[speed, 75.0].strides.toe_off_pct.min()
            stance = m[m.pct < toe_off - 1.0]
            assert stance.force_n.isna().all()  # forces (and so work) only in swing
    work = {s: _per_muscle(sprints[s, 75.0], "negative_work_j")[[BICEPS, SEMITEND, SEMIMEM]].sum() for s in (8.0, 9.0)}
    assert work[9.0] > 1.05 * work[8.0]


def test_peak_force_and_work_of_the_order_published(sprints):
    # Order of magnitude for sprinting (about 9 m/s): biarticular peak forces of the order of 1-4 kN, i.e. 10-50 N/kg,
    # and negative work per muscle and stride of the order of 5-80 J (Schache et al. 2012; Chumanov et al. 2011;
    # [M] magnitudes, [V] that they are large in terminal swing). Generous bounds: a factor of 3 either way of the
    # middle would fail.
    r = sprints[9.0, 75.0]
    force, work = _per_muscle(r, "peak_force_n") / 75.0, _per_muscle(r, "negative_work_j")
    for muscle in (BICEPS, SEMITEND, SEMIMEM):
        assert 3.0 < force[muscle] < 60.0, muscle
        assert 2.0 < work[muscle] < 100.0, muscle


def test_force_and_work_bands_bracket_the_nominal_values(sprints):
    s = sprints[9.0, 75.0].strides
    for metric in ("peak_force_n", "negative_work_j"):
        low, high, nominal = s[f"{metric}_p5"], s[f"{metric}_p95"], s[metric]
        assert (low <= high).all() and np.isfinite(low).all()
        width = (high - low) / nominal
        assert (width[s.muscle != SHORT] > 0.1).all()  # a real band, not "+- 1 N"
        inside = (nominal >= 0.8 * low) & (nominal <= 1.2 * high)
        assert inside.mean() > 0.9, metric


def test_force_status_says_where_the_demand_is_not_met(sprints):
    s = sprints[9.0, 75.0].strides
    met = s.late_swing_moments_met_pct
    assert ((s.force_status == "met") == (met >= 100.0)).all()
    assert ((s.force_status == "not_met") == (met < 90.0)).all()
    assert ((met < 100.0) == ((s.peak_hip_extension_reserve_nm_per_kg > 0.0)
                              | (s.peak_knee_flexion_reserve_nm_per_kg > 0.0))).all()
    both = np.minimum(s.late_swing_hip_extension_met_pct, s.late_swing_knee_flexion_met_pct)
    assert (met <= both + 1e-9).all()


@pytest.mark.xfail(strict=True, reason="issue 14 acceptance not reached (measured 64 % at 8 m/s, 60 % at 9 m/s with the "
                   "least-effort swing of synth and sprinters' volumes, Handsfield et al. 2017; 58 / 52 % with the "
                   "earlier constant-acceleration swing, 48 / 40 % with the general population's volumes): mid-swing "
                   "is now met, but 65-80 % of the swing is unmet in 30-48 % of frames and the last 20 % in 90-92 %: "
                   "there the net hip extension demand is 4.4-4.9 N m/kg while the hip extends at 260-500 deg/s and "
                   "the hamstrings shorten after their peak length (84 % of the cycle; Nagano et al. 2014: 82.8 %), "
                   "so all hip extensors give 1.3-2.8 N m/kg (even isometric 2.4-2.9 x 1.3). Not reached either with "
                   "v_max 15 l_opt/s, tendon recoil in the fibre velocity, the demand halved, or a hip extension "
                   "rate peaking before the strike (56-62 %); see DEVELOPERS.md 'The force model'")
def test_hamstring_relevant_demand_met_in_nine_tenths_of_late_swing(sprints):
    # Issue 14 acceptance: >= 90 % of late-swing frames at default strength, at 8 and 9 m/s.
    for speed in (8.0, 9.0):
        assert sprints[speed, 75.0].strides.late_swing_moments_met_pct.mean() >= 90.0


@pytest.mark.parametrize("height_m", [1.65, 1.80, 1.95])
def test_resting_fibre_length_at_standing_is_on_the_ascending_limb(height_m):
    # Standing (hip 0, knee 0), no force: the biarticular hamstrings rest below their optimal length (Wan et al.
    # 2017, J Sport Health Sci 6:275 [V]: optimal lengths longer than standing lengths; Kellis & Blazevich 2022,
    # BMC Sports Sci Med Rehabil 14:166 [M for this point]: the hamstrings work on the ascending limb near hip and
    # knee neutral)
    # and within the active range (0.5-1.5 l_opt, common practice). The short head, a knee-only muscle, is at its
    # longest with the knee straight: near optimal length (0.9-1.2, our line, common practice).
    from hamstride import muscles as M

    table = M.muscle_table(0.0, 0.0, M.MuscleDims.from_height(height_m)).set_index("muscle")
    for muscle in (BICEPS, SEMITEND, SEMIMEM):
        assert 0.6 < table.loc[muscle, "resting_fibre_length_lopt"] < 1.0, muscle
    assert 0.9 < table.loc[SHORT, "resting_fibre_length_lopt"] < 1.2
    # the tendon carries the difference: loaded at F0 it is 4.9 % longer, so the fibres are shorter
    assert (table["fibre_length_lopt"] < table["resting_fibre_length_lopt"]).all()


def test_no_loaded_hamstring_below_half_its_optimal_length_on_generated_sprints(sprints):
    for key, result in sprints.items():
        assert "short_fibres" not in result.info["warning_codes"], key


def test_short_fibre_warning_fires_only_for_loaded_short_fibres():
    from types import SimpleNamespace

    from hamstride.pipeline import _short_fibre_warning
    from hamstride.muscles import MUSCLES

    n = 20
    stride = SimpleNamespace(side="left", start_frame=0, end_frame=n - 1)
    lopt = {m: np.full(n, 0.9) for m in MUSCLES}
    force = {m: np.full(n, 100.0) for m in MUSCLES}
    lopt[SEMIMEM][5] = 0.3  # short while carrying 100 N of 1000 N: warned
    lopt[BICEPS][6] = 0.3
    force[BICEPS][6] = 10.0  # short but carrying 1 % of F0: not warned
    shared = {"left": SimpleNamespace(fibre_length_lopt=lopt, force_n=force)}
    states = {"left": {m: SimpleNamespace(max_isometric_force_n=1000.0) for m in MUSCLES}}
    info = {"warnings": [], "warning_codes": []}
    _short_fibre_warning(["left"], [stride], states, shared, {}, info)
    assert info["warning_codes"] == ["short_fibres"]
    assert "left semimembranosus 0.30" in info["warnings"][0] and BICEPS not in info["warnings"][0]


def test_summary_carries_the_band_means_of_force_and_work(sprints):
    from hamstride.metrics import summarise

    strides = sprints[9.0, 75.0].strides
    summary = summarise(strides)
    for column in ("peak_force_n_p5", "peak_force_n_p95", "negative_work_j_p5", "negative_work_j_p95",
                   "late_swing_hip_extension_met_pct", "late_swing_knee_flexion_met_pct"):
        for _, row in summary.iterrows():
            mine = strides[(strides.side == row.side) & (strides.muscle == row.muscle)][column]
            assert row[f"{column}_mean"] == pytest.approx(mine.mean()), column


def test_band_on_every_second_frame_stays_close_to_the_band_on_every_frame(tmp_path, monkeypatch):
    # The band is solved at >= 100 Hz (dynamics.BAND_MIN_RATE_HZ); against every frame its percentiles move by a
    # small part of the band's width (our lines: 10 % for force, 20 % for work, measured 5 % and 11 %).
    from hamstride import dynamics

    path = tmp_path / "sprint.c3d"
    synth.write_sprint_trial(path, synth.SprintSpec(speed_m_s=9.0, seed=3))
    athlete = AthleteInfo(body_mass_kg=75.0, height_m=1.80)
    decimated = analyse_trial(path, athlete=athlete).strides
    monkeypatch.setattr(dynamics, "BAND_MIN_RATE_HZ", 1e9)
    full = analyse_trial(path, athlete=athlete).strides
    for metric, line in (("peak_force_n", 0.10), ("negative_work_j", 0.20)):
        width = full[f"{metric}_p95"] - full[f"{metric}_p5"]
        for q in ("p5", "p95"):
            moved = (decimated[f"{metric}_{q}"] - full[f"{metric}_{q}"]).abs()
            assert (moved <= line * width + 1e-9).all(), (metric, q)


@pytest.mark.parametrize("knee_deg", [0.0, 30.0, 60.0])
def test_hip_extensor_moment_arms_have_the_published_shape_over_0_to_90_degrees(knee_deg):
    # Published in vivo shape of the hip-extension moment arms against hip flexion (a strength-training
    # biomechanics textbook page, underpop.online.fr/b/biomecanica-da-musculacao/a-biomecanica-da-musculacao55.html
    # [V for this description; the study it summarises is not named there; it matches Nemeth & Ohlsen 1985, J Biomech
    # 18:129, from memory]): gluteus maximus has the largest hip-extension moment arm of the hip extensors, largest
    # at neutral and smaller at any flexion beyond it; the hamstrings' grows as the hip flexes to about 35 deg and
    # falls from there; theirs stays below gluteus maximus' at every angle. Our lines: the hamstring peak between 15
    # and 50 deg, more than 5 % above its value at 0 deg, and at 90 deg more than 10 % below it. Posterior adductor
    # magnus: an extensor at every angle whose arm grows with flexion (Nemeth & Ohlsen 1985 [M]).
    # Magnitudes are not tested: no published values could be verified (model, 1.80 m: hamstrings 45-50 mm at 0 deg,
    # 49-55 at 30, 22-27 at 90; gluteus maximus 65 / 58 / 45 mm; DEVELOPERS.md "The force model").
    from hamstride import dynamics as D
    from hamstride import muscles as M

    dims = M.MuscleDims.from_height(1.80)
    hip = np.arange(0.0, 91.0, 5.0)
    arm = {m: -np.array([M.muscle_table(h, knee_deg, dims).set_index("muscle").loc[m, "hip_flexion_arm_mm"]
                         for h in hip]) for m in (BICEPS, SEMITEND, SEMIMEM)}
    gmax = -1000.0 * D._gluteus_hip_arm(np.radians(hip))
    amag = -1000.0 * D._adductor_magnus_hip_arm(np.radians(hip))
    assert np.argmax(gmax) == 0 and np.all(np.diff(gmax) < 0)
    assert np.all(amag > 0) and np.all(np.diff(amag) > 0)
    for muscle, r in arm.items():
        peak = np.argmax(r)
        assert 15.0 <= hip[peak] <= 50.0, muscle
        assert r[peak] > 1.05 * r[0] and r[-1] < 0.9 * r[peak], muscle
        assert np.all(np.diff(r[peak:]) < 0), muscle  # falls from the peak on
        assert np.all(r < gmax), muscle
