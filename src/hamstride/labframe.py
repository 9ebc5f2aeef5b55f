"""The internal lab frame from anatomy: x forward along the direction of travel, y to the athlete's left, z up.

Files come in the lab's own axes (Z-up or Y-up, running toward +x or -x, ...). After the landmarks are resolved the
file's axes are mapped to the internal frame from the athlete's body, not from statistics of the marker cloud (which
fail once trunk, arm and head markers sit above the pelvis):

* **up**: from the feet (heel, metatarsal heads, toe, malleoli) to the pelvis (ASIS, PSIS); the pelvis is above the
  feet in every running or standing frame;
* **forward**: the direction the pelvis travels when it moves more than half a metre (overground); otherwise the
  direction opposite to the stance foot's motion (a treadmill belt carries the planted foot backward); otherwise
  (a standing trial) the direction from the mid-PSIS to the mid-ASIS;
* **left** = up x forward (right-handed). It never comes from the ASIS labels, so
  :func:`hamstride.checks.check_sides` can still catch a file whose left/right labels are swapped.

Each direction is snapped to the nearest file axis (labs align their axes with the runway), so the mapping is a
signed permutation: coordinates are only relabelled and negated, never mixed.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, replace

import numpy as np

from .errors import LandmarkError
from .landmarks import Landmarks
from .numerics import SIDES

__all__ = ["PELVIS_SITES", "FOOT_SITES", "OVERGROUND_TRAVEL_M", "MIN_BELT_SPEED_M_S", "SAMPLE_FRAMES", "LabFrame",
           "detect_lab_frame", "rotate_landmarks", "to_lab_frame"]

PELVIS_SITES = ("asis", "psis")
FOOT_SITES = ("heel", "first_metatarsal", "fifth_metatarsal", "toe_tip", "lateral_malleolus", "medial_malleolus")
#: Net pelvis travel above this is an overground trial (a treadmill athlete drifts a few centimetres; common practice).
OVERGROUND_TRAVEL_M = 0.5
#: The stance foot must move at least this fast (median, m/s) to tell the belt's direction (common practice: the
#: slowest treadmill runs are about 2 m/s; a standing athlete's feet move a few mm/s).
MIN_BELT_SPEED_M_S = 0.5
_AXES = "xyz"
#: Frames (evenly spread) whose medians decide up and, standing, the facing direction: some sixty frames are as
#: decisive as all of them and keep this stage well under a millisecond.
SAMPLE_FRAMES = 60


@dataclass(frozen=True)
class LabFrame:
    """How the file's axes were mapped to the internal lab frame (x forward, y left, z up)."""

    file_to_lab: np.ndarray  # 3x3 rotation: lab = file_to_lab @ file
    vertical_axis: str  # e.g. '+z' or '+y' in file axes
    travel_axis: str  # e.g. '+x' or '-x' in file axes
    overground: bool  # the pelvis travels (False on a treadmill or standing)
    travel_from: str = "pelvis motion"  # 'pelvis motion', 'stance foot' or 'pelvis orientation'


def _mean_of(points: list[np.ndarray]) -> np.ndarray:
    """NaN-aware mean of several [F, 3] tracks (NaN where none is seen)."""
    stack = np.stack(points)
    seen = np.isfinite(stack).all(axis=2)
    total = np.where(seen[..., None], stack, 0.0).sum(axis=0)
    count = seen.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return total / np.where(count > 0, count, np.nan)[:, None]


def _snap(direction: np.ndarray, allowed: tuple[int, ...]) -> tuple[int, float]:
    """The file axis among ``allowed`` closest to ``direction`` and its sign."""
    axis = max(allowed, key=lambda a: abs(direction[a]))
    return axis, (1.0 if direction[axis] >= 0 else -1.0)


def _sites(lm: Landmarks, sites: tuple[str, ...]) -> list[np.ndarray]:
    return [np.asarray(lm.points[f"{side}_{site}"], float) for side in SIDES for site in sites
            if f"{side}_{site}" in lm.points]


def detect_lab_frame(lm: Landmarks) -> LabFrame:
    """Map the file's axes to the internal lab frame from the landmarks (in file axes, metres).

    Raises LandmarkError 'lab_frame' when neither the pelvis nor the feet are seen in any frame.
    """
    pelvis_tracks, foot_tracks = _sites(lm, PELVIS_SITES), _sites(lm, FOOT_SITES)
    if not pelvis_tracks or not foot_tracks:
        raise LandmarkError("cannot tell which way is up: the pelvis (ASIS/PSIS) or the feet (heel, metatarsals, "
                            "malleoli) are not in the file; check the labels in markers.toml", trial=lm.trial,
                            code="lab_frame")
    every = max(1, lm.n_frames // SAMPLE_FRAMES)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        pelvis = _mean_of(pelvis_tracks)
        feet = _mean_of([track[::every] for track in foot_tracks])
        up_vec = np.nanmedian(pelvis[::every] - feet, axis=0)
    if not np.isfinite(up_vec).all():
        raise LandmarkError("cannot tell which way is up: the pelvis and the feet are never seen in the same frame",
                            trial=lm.trial, code="lab_frame")
    vertical, up_sign = _snap(up_vec, (0, 1, 2))
    horizontal = tuple(a for a in range(3) if a != vertical)

    seen = np.flatnonzero(np.isfinite(pelvis).all(axis=1))
    travel = pelvis[seen[-1]] - pelvis[seen[0]] if seen.size >= 2 else np.zeros(3)
    overground = bool(max(abs(travel[a]) for a in horizontal) > OVERGROUND_TRAVEL_M)
    if overground:
        forward_axis, forward_sign = _snap(travel, horizontal)
        source = "pelvis motion"
    else:
        belt = _stance_foot_velocity(lm, vertical, up_sign)
        if np.isfinite(belt).all() and max(abs(belt[a]) for a in horizontal) > MIN_BELT_SPEED_M_S:
            forward_axis, forward_sign = _snap(-belt, horizontal)
            source = "stance foot"
        else:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                front = (_mean_of([x[::every] for x in _sites(lm, ("asis",))])
                         - _mean_of([x[::every] for x in _sites(lm, ("psis",))]))
                anterior = np.nanmedian(front, axis=0)
            if not np.isfinite(anterior).all():
                raise LandmarkError("cannot tell which way the athlete faces: the pelvis neither travels nor shows "
                                    "its ASIS and PSIS markers; check the pelvis labels", trial=lm.trial,
                                    code="lab_frame")
            forward_axis, forward_sign = _snap(anterior, horizontal)
            source = "pelvis orientation"
    ez = np.zeros(3)
    ez[vertical] = up_sign
    ex = np.zeros(3)
    ex[forward_axis] = forward_sign
    ey = np.cross(ez, ex)
    rot = np.vstack([ex, ey, ez])
    return LabFrame(rot, f"{'+' if up_sign > 0 else '-'}{_AXES[vertical]}",
                    f"{'+' if forward_sign > 0 else '-'}{_AXES[forward_axis]}", overground, source)


def _stance_foot_velocity(lm: Landmarks, vertical: int, up_sign: float) -> np.ndarray:
    """Median velocity (file axes, m/s) of each frame's lowest foot landmark, over frames where the same landmark
    stays lowest: on a treadmill the planted foot moves with the belt."""
    tracks = _sites(lm, ("heel", "first_metatarsal", "fifth_metatarsal", "toe_tip"))
    if not tracks:
        return np.full(3, np.nan)
    stack = np.stack(tracks, axis=1)  # [F, k, 3]
    height = np.where(np.isfinite(stack[:, :, vertical]), up_sign * stack[:, :, vertical], np.inf)
    lowest = np.argmin(height, axis=1)
    low = stack[np.arange(len(stack)), lowest]  # [F, 3]
    step = np.diff(low, axis=0) * lm.rate_hz
    keep = (lowest[1:] == lowest[:-1]) & np.isfinite(step).all(axis=1)
    if keep.sum() < 3:
        return np.full(3, np.nan)
    return np.median(step[keep], axis=0)


def rotate_landmarks(lm: Landmarks, lab: LabFrame) -> Landmarks:
    """Landmarks and clusters expressed in the internal lab frame."""
    rot = lab.file_to_lab.T
    return lm.replace(points={k: v @ rot for k, v in lm.points.items()},
                      clusters={k: v @ rot for k, v in lm.clusters.items()})


def to_lab_frame(trial, lm: Landmarks):
    """(trial, landmarks) in the internal lab frame, with the :class:`LabFrame` recorded on the trial
    (``trial.lab``); ``trial`` is an :class:`hamstride.io.MarkerTrial` in file axes."""
    lab = detect_lab_frame(lm)
    return replace(trial, xyz=trial.xyz @ lab.file_to_lab.T, lab=lab), rotate_landmarks(lm, lab)
