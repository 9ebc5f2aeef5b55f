"""Shared test helper: the swing demand of a generated trial (hamstride.synth), NOT a truth.

Our swing inverse dynamics applied to the generator's noise-free segment frames and joint centres. It is an input
for tests of what comes after the moments (force sharing, published behaviour, the generator's own demand bounds);
no test compares the pipeline's moments with it. The inverse dynamics itself is checked against physics that does
not use it: a three-link swing leg driven by known torques and integrated with scipy.integrate.solve_ivp
(test_dynamics: test_inverse_dynamics_recovers_simulated_torques_*), a spherical ankle with gyroscopic terms and the
work-energy theorem.
"""
from __future__ import annotations

from hamstride import dynamics as dyn
from hamstride.segments import Frames


def generated_swing_moments(truth, side: str):
    """JointMoments of one leg's swings from the generator's noise-free frames and joint centres (our inverse
    dynamics; see the module docstring)."""
    b, rate, n = truth.body, truth.rate_hz, truth.time_s.size
    seg = {s: Frames(truth.origins[f"{side}_{s}"], truth.axes[f"{side}_{s}"]) for s in dyn.SEGMENTS}
    swing = dyn.swing_mask_from_events(n, rate, truth.toe_offs_s[side], truth.foot_strikes_s[side])
    return dyn.swing_inverse_dynamics(
        seg["thigh"], seg["shank"], seg["foot"], truth.joint_centres[f"{side}_hip"],
        truth.joint_centres[f"{side}_knee"], truth.joint_centres[f"{side}_ankle"],
        truth.landmarks_lab[f"{side}_heel"], truth.landmarks_lab[f"{side}_toe_tip"], rate,
        dyn.leg_inertia(b.mass_kg, b.sex, b.thigh_length_m, b.shank_length_m, b.foot_length_m),
        swing_mask=swing, pelvis=Frames(truth.origins["pelvis"], truth.axes["pelvis"]), side=side)
