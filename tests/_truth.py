"""Shared test helper: swing inverse dynamics of a synthetic trial's noise-free truth (hamstride.synth)."""
from __future__ import annotations

from hamstride import dynamics as dyn
from hamstride.segments import Frames


def truth_swing_moments(truth, side: str):
    """JointMoments of one leg's swings, computed from the generator's truth frames and joint centres."""
    b, rate, n = truth.body, truth.rate_hz, truth.time_s.size
    seg = {s: Frames(truth.origins[f"{side}_{s}"], truth.axes[f"{side}_{s}"]) for s in dyn.SEGMENTS}
    swing = dyn.swing_mask_from_events(n, rate, truth.toe_offs_s[side], truth.foot_strikes_s[side])
    return dyn.swing_inverse_dynamics(
        seg["thigh"], seg["shank"], seg["foot"], truth.joint_centres[f"{side}_hip"],
        truth.joint_centres[f"{side}_knee"], truth.joint_centres[f"{side}_ankle"],
        truth.landmarks_lab[f"{side}_heel"], truth.landmarks_lab[f"{side}_toe_tip"], rate,
        dyn.leg_inertia(b.mass_kg, b.sex, b.thigh_length_m, b.shank_length_m, b.foot_length_m),
        swing_mask=swing, pelvis=Frames(truth.origins["pelvis"], truth.axes["pelvis"]), side=side)
