"""One trial through every stage: C3D -> landmarks -> filtered -> segments -> angles -> events -> strides ->
muscles -> dynamics -> per-stride metrics, returned as tidy tables (the export contract of design.md).

The same function serves the CLI, the squad batch and a notebook.
"""
from __future__ import annotations

import functools
import os
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Mapping, NamedTuple

import numpy as np

from . import __version__
from .checks import strict_failure
from .errors import EventError, HamstrideError, PlausibilityError, TrialWarning
from .numerics import SIDES

if TYPE_CHECKING:  # the tables are numpy columns; pandas is loaded when a DataFrame view is asked for
    import pandas as pd

__all__ = ["STRIDE_COLUMNS", "FORCE_STATUS_MOSTLY_MET_PCT", "SHORT_FIBRE_LOPT", "SHORT_FIBRE_FORCE_FRACTION",
           "CURVE_COLUMNS", "AnalysisOptions", "AthleteInfo", "TrialResult", "Kinematics", "static_calibration",
           "landmarks_with_static", "trial_kinematics", "analyse_trial"]

STRIDE_COLUMNS = [
    "athlete", "session", "trial", "side", "stride", "muscle", "foot_strike_s", "toe_off_s", "next_foot_strike_s",
    "stride_time_s", "toe_off_pct", "late_swing_start_pct", "speed_m_s", "peak_hip_flexion_deg",
    "peak_knee_flexion_deg", "peak_strain_pct", "peak_strain_time_pct", "peak_strain_p5_pct", "peak_strain_p95_pct",
    "peak_fibre_length_lopt", "peak_fibre_length_lopt_p5", "peak_fibre_length_lopt_p95",
    "peak_lengthening_velocity_lopt_per_s", "peak_force_n", "negative_work_j", "positive_work_j",
    "late_swing_moments_met_pct", "late_swing_hip_extension_met_pct", "late_swing_knee_flexion_met_pct",
    "peak_hip_extension_reserve_nm_per_kg", "peak_knee_flexion_reserve_nm_per_kg", "force_status",
    "peak_force_n_p5", "peak_force_n_p95", "negative_work_j_p5", "negative_work_j_p95", "event_source",
]
#: ``force_status`` of a stride: the share of late-swing frames whose hip-extension and knee-flexion demand the
#: modelled muscles meet (``late_swing_moments_met_pct``): all of them, at least this share, or fewer.
FORCE_STATUS_MOSTLY_MET_PCT = 90.0
#: Fibre length (l/l_opt) below which a trial warns: the lower end of the active force range (0.5-1.5 l_opt,
#: common practice, references.md).
SHORT_FIBRE_LOPT = 0.5
#: ... while carrying at least this fraction of its maximum isometric force (assumption: below it the force is
#: too small to matter).
SHORT_FIBRE_FORCE_FRACTION = 0.05
CURVE_COLUMNS = [
    "athlete", "session", "trial", "side", "stride", "muscle", "pct", "hip_flexion_deg", "hip_adduction_deg",
    "knee_flexion_deg", "length_m", "strain_pct", "fibre_length_lopt", "velocity_lopt_per_s", "force_n", "power_w",
    "hip_moment_nm_per_kg", "knee_moment_nm_per_kg",
]


@dataclass(frozen=True)
class AnalysisOptions:
    """Settings that change results (they are part of the cache key and recorded in manifest.json)."""

    cutoff_hz: float | None = None  # None: Winter's residual analysis per trial
    max_gap_frames: int = 10  # common practice
    hip_method: str = "harrington"
    stride_time_range_s: tuple[float, float] = (0.3, 1.0)  # strides.DEFAULT_STRIDE_TIME_RANGE_S (sprint to jog)
    contact_range_s: tuple[float, float] = (0.06, 0.4)  # strides.DEFAULT_CONTACT_RANGE_S (sprint to jog)
    monte_carlo_samples: int = 200
    force_band_samples: int = 20  # Monte Carlo samples of the force and work band (each a full sharing solve); 0: none
    scale_force_to_mass: bool = False  # no effect since issue 14: strength always scales with mass x height
    min_strides: int = 1
    min_speed_m_s: float = 2.5  # return-to-run jogging from about 3 m/s is analysed (checks.MIN_SPRINT_SPEED_M_S)
    strict: bool = False  # --strict: any warning fails the trial


@dataclass(frozen=True)
class AthleteInfo:
    athlete: str = ""
    session: str = ""
    body_mass_kg: float | None = None
    height_m: float | None = None
    sex: str = "male"
    leg_length_m: float | None = None
    strength_factor: float = 1.0  # athlete's own multiplier on the volume-based muscle strength (athletes.csv)


@dataclass(frozen=True, eq=False)
class TrialResult:
    """One trial's results. ``tables`` holds the strides and curves tables as columns in export order (numpy
    arrays); ``strides`` and ``curves`` are the same as pandas tables, built on first use (writers that need only
    the text take the columns, see ``batch.columns_csv``)."""

    trial: str
    tables: Mapping[str, Mapping[str, np.ndarray]]
    info: Mapping[str, object] = field(default_factory=dict)

    @functools.cached_property
    def strides(self) -> pd.DataFrame:
        return _table_frame(self.tables["strides"], STRIDE_COLUMNS)

    @functools.cached_property
    def curves(self) -> pd.DataFrame:
        return _table_frame(self.tables["curves"], CURVE_COLUMNS)


def _table_frame(columns: Mapping[str, np.ndarray], names: list[str]) -> pd.DataFrame:
    import pandas as pd

    if not columns:
        return pd.DataFrame(columns=names)
    return pd.DataFrame({name: columns[name] for name in names}, index=pd.RangeIndex(len(columns[names[0]])))


@dataclass(frozen=True)
class Kinematics:
    """The kinematic half of a trial: filtered landmarks, segments, angles, events, strides and speed."""

    trial: object  # io.MarkerTrial
    landmarks: object  # landmarks.Landmarks, gap-filled and filtered
    filter_info: object  # signal.FilterInfo
    body: object  # segments.Body
    angles: object  # angles.JointAngles
    events: object  # events.GaitEvents
    strides: tuple  # strides.Stride, valid and rejected
    treadmill: bool
    speed_m_s: float
    warnings: tuple[str, ...]
    warning_codes: tuple[str, ...] = ()  # one short code per warning (errors.TrialWarning)
    plates: object = None  # plates.PlateReport when the file has force plates
    window: object = None  # landmarks.VisibleWindow: the file's frames analysed (the arrays above hold only those)
    rebuilt: Mapping[str, float] = field(default_factory=dict)  # landmark -> % of window frames rebuilt (static)

    @property
    def valid_strides(self) -> list:
        return [s for s in self.strides if s.valid]


def static_calibration(static_path: str | Path, marker_map):
    """A static trial's filtered landmarks and segment calibration (segments.calibrate), worked out once per
    process for each file and marker map: the sprints of a session share them. The file's size and modification
    time are part of the key, so a changed file is read again."""
    stat = os.stat(static_path)
    key = (os.path.realpath(static_path), stat.st_mtime_ns, stat.st_size, marker_map.source, marker_map.prefix,
           tuple(sorted(marker_map.landmarks.items())),
           tuple(sorted((name, tuple(labels)) for name, labels in marker_map.clusters.items())))
    if key not in _STATIC_CALIBRATIONS:
        if len(_STATIC_CALIBRATIONS) >= 8:  # a few sessions at a time: the oldest goes
            _STATIC_CALIBRATIONS.pop(next(iter(_STATIC_CALIBRATIONS)))
        _STATIC_CALIBRATIONS[key] = _static_calibration(str(static_path), marker_map)
    return _STATIC_CALIBRATIONS[key]


_STATIC_CALIBRATIONS: dict[tuple, tuple] = {}


def _static_calibration(static_path: str, marker_map):
    from .c3d import MarkerTrial, read_c3d
    from .landmarks import resolve_landmarks
    from .segments import calibrate
    from .signal import smooth_landmarks

    static_lm = resolve_landmarks(read_c3d(static_path), marker_map)
    static_lm, _ = smooth_landmarks(static_lm, cutoff_hz=6.0)
    return static_lm, calibrate(static_lm)


def landmarks_with_static(trial, marker_map, static_path: str | Path | None = None):
    """A trial's landmarks, with those missing rebuilt from a static trial's calibration (rigid fit of the segment's
    cluster; segments.reconstruct_missing). Returns (landmarks, landmarks as seen in the file, the landmarks the
    static trial could rebuild, the calibration or None). Errors in the static trial name the dynamic trial."""
    from .landmarks import recoverable_landmarks, resolve_landmarks
    from .segments import reconstruct_missing

    if static_path is None:
        lm = resolve_landmarks(trial, marker_map)
        return lm, lm, (), None
    try:
        static_lm, calibration = static_calibration(static_path, marker_map)
    except HamstrideError as exc:  # name the sprint trial and say the problem is in its static trial
        raise type(exc)(f"its static calibration trial {Path(static_path).name} failed ({exc.message}); fix or "
                        "remove that file", trial=trial.name, code=exc.code) from None
    recoverable = recoverable_landmarks(marker_map, static_lm, trial)
    seen = resolve_landmarks(trial, marker_map, allow_missing=recoverable)
    return reconstruct_missing(seen, calibration), seen, recoverable, calibration


def trial_kinematics(path: "str | Path | MarkerTrial", options: AnalysisOptions = AnalysisOptions(), *,
                     athlete: AthleteInfo = AthleteInfo(), static_path: str | Path | None = None,
                     markers: str | Path | None = None) -> Kinematics:
    """io -> landmarks -> signal -> segments -> angles -> events -> strides for one trial.

    ``path``: a C3D file, or a trial already in memory (``c3d.MarkerTrial`` as ``c3d.read_c3d`` returns it, e.g.
    edited in a notebook); its force plates are read from ``trial.path`` when that file exists and has them."""
    from .angles import joint_angles
    from .checks import (check_body_size, check_landmark_gaps, check_marker_trial, check_sides, check_speed,
                         check_stride_count)
    from .events import detect_events, drop_events_near_edges, is_treadmill, running_speed
    from .c3d import MarkerTrial, read_c3d
    from .labframe import to_lab_frame
    from .landmarks import crop_landmarks, crop_trial, load_marker_map, visible_window
    from .plates import apply_plate_contacts, attach_force_plates, crop_force_plates
    from .segments import build_body, rebuilt_landmarks
    from .signal import EDGE_GAP_NOTE, smooth_landmarks
    from .strides import cut_strides

    marker_map = load_marker_map(markers)
    trial = path if isinstance(path, MarkerTrial) else read_c3d(Path(path))
    warnings: list[TrialWarning] = list(check_marker_trial(trial, marker_map.landmarks.values()))
    lm, seen, recoverable, calibration = landmarks_with_static(trial, marker_map, static_path)
    # overground capture volume: analyse where every required landmark is seen (missing before the athlete enters
    # and after they leave is not a gap)
    window = visible_window(lm, options.max_gap_frames)
    if not window.whole:
        lm, seen = crop_landmarks(lm, window, keep_clusters=False), crop_landmarks(seen, window)
        trial = crop_trial(trial, window)
    trial, lm = to_lab_frame(trial, lm)  # file axes -> x forward, y left, z up, from the landmarks
    rebuilt = rebuilt_landmarks(seen, lm) if calibration is not None else {}
    check_landmark_gaps(lm, skip=recoverable)
    check_sides(lm, marker_map)
    check_body_size(lm, trial.units_in_file)
    # the clusters have done their work (rebuilding landmarks from the static trial): only the points are filtered
    unfiltered = lm  # the foot strikes' touchdown changepoint is fitted to the unfiltered heights (events.py)
    lm, filter_info = smooth_landmarks(lm, cutoff_hz=options.cutoff_hz, max_gap_frames=options.max_gap_frames,
                                       keep_clusters=False)
    # at the edges of a capture volume's window, a marker not yet (or no longer) seen is outside it, not a gap
    warnings.extend(TrialWarning("long_gap", w) for w in filter_info.long_gaps
                    if window.whole or EDGE_GAP_NOTE not in w)
    leg_length = athlete.leg_length_m or getattr(calibration, "leg_length_m", None)
    body = build_body(lm, hip_method=options.hip_method, leg_length_m=leg_length)
    angles = joint_angles(body)
    knee = {side: angles[side]["knee_flexion"] for side in SIDES}
    try:  # in a capture volume's window the strides are counted after the edge guard (check_stride_count)
        events = detect_events(lm, c3d_events=trial.events, knee_flexion=knee,
                               min_strides=options.min_strides if window.whole else 0, unfiltered=unfiltered)
    except EventError as exc:
        if exc.code != "few_strides" or window.whole:
            raise
        message = exc.message.removeprefix(f"trial {exc.trial}: ")
        raise EventError(f"{message} Every landmark is seen only {window.describe()} of the file (the capture "
                         "volume)", trial=trial.name, code="few_strides") from None
    events, dropped = drop_events_near_edges(events, lm.n_frames, trial.rate_hz, start=window.start > 0,
                                             end=window.stop < window.n_frames)
    warnings.extend(TrialWarning("event_rules", w) for w in events.warnings)
    warnings.extend(TrialWarning("event_disagreement", w) for w in events.disagreements)
    trial = attach_force_plates(trial)  # needs the trial's lab frame (file axes -> lab) for the plate corners
    if window.start:  # plate samples from the analysed window's first frame, as the events' times
        trial = replace(trial, force_plates=crop_force_plates(trial.force_plates, window.start_s))
    events, plate_report = apply_plate_contacts(events, trial.force_plates, lm)
    if plate_report is not None:
        warnings.extend(TrialWarning("plate_contact", w) for w in plate_report.left_out)
    treadmill = bool(is_treadmill(lm))
    speed = float(running_speed(lm, events, treadmill))
    check_speed(speed, trial.name, min_speed_m_s=options.min_speed_m_s)
    strides = cut_strides(events, trial.rate_hz, lm.n_frames, knee, stride_time_range=options.stride_time_range_s,
                          contact_range=options.contact_range_s)
    check_stride_count(strides, options.min_strides, trial.name, window, dropped)
    warnings.extend(TrialWarning("stride_rejected", f"{s.side} stride {s.index + 1}: {s.reason}")
                    for s in strides if not s.valid)
    return Kinematics(trial, lm, filter_info, body, angles, events, tuple(strides), treadmill, speed,
                      tuple(w.message for w in warnings), tuple(w.code for w in warnings), plate_report,
                      window, rebuilt)


def analyse_trial(path: "str | Path | MarkerTrial", options: AnalysisOptions = AnalysisOptions(), *, athlete: AthleteInfo = AthleteInfo(),
                  static_path: str | Path | None = None, markers: str | Path | None = None) -> TrialResult:
    """Run one trial (a C3D file, or a ``c3d.MarkerTrial`` in memory) through the whole pipeline and return its
    stride and curve tables."""
    kin = trial_kinematics(path, options, athlete=athlete, static_path=static_path, markers=markers)
    trial = kin.trial
    valid = kin.valid_strides
    if not valid:
        rejected = [f"{s.side} stride {s.index + 1}: {s.reason}" for s in kin.strides]
        raise PlausibilityError("no valid stride in the trial (" + "; ".join(rejected[:3]) + ")", trial=trial.name,
                                code="few_strides")
    body_mass = athlete.body_mass_kg or trial.meta.get("body_mass_kg")
    window = kin.window
    info = {
        "trial": trial.name, "rate_hz": trial.rate_hz, "n_frames": window.n_frames,
        "window_start_s": window.start_s, "window_end_s": window.end_s, "window_duration_s": window.duration_s,
        "rebuilt_landmarks": dict(kin.rebuilt),
        "cutoff_hz": kin.filter_info.cutoff_hz, "cutoff_method": kin.filter_info.method,
        "vertical_axis": trial.lab.vertical_axis, "travel_axis": trial.lab.travel_axis, "treadmill": kin.treadmill,
        "speed_m_s": kin.speed_m_s, "event_method": kin.events.method,
        "n_strides": {s: sum(1 for v in valid if v.side == s) for s in SIDES},
        "body_mass_kg": body_mass, "warnings": list(kin.warnings),
        "warning_codes": list(kin.warning_codes), "software_version": __version__,
        "hip_method": kin.body.hip_method,
    }
    if kin.plates is not None:
        info["force_plates"] = kin.plates.as_info()
    strides, curves = _muscle_tables(trial, kin.body, kin.angles, valid, options, athlete, body_mass,
                                     kin.speed_m_s, info)
    if window.start:  # times from the file's first frame, as in the file and its events
        for name in ("foot_strike_s", "toe_off_s", "next_foot_strike_s"):
            strides[name] = strides[name] + window.start_s
    if options.strict:
        failure = strict_failure(map(TrialWarning, info["warning_codes"], info["warnings"]), trial.name)
        if failure is not None:
            raise failure
    return TrialResult(trial.name, {"strides": strides, "curves": curves}, info)


def _late_swing_start_frame(s, rate: float) -> int:
    """First frame of late swing (swing-phase peak knee flexion), or toe-off when knee angles were missing."""
    if np.isfinite(s.late_swing_start_pct):
        late = int(round(s.foot_strike_s * rate + s.late_swing_start_pct / 100.0 * s.stride_time_s * rate))
    else:
        late = int(round(s.toe_off_s * rate))
    return min(max(late, s.start_frame), s.end_frame)


class _Leg(NamedTuple):
    """What one leg's tables need, gathered before the legs share one force-sharing solve."""

    strides: list
    joint: dict
    states: dict
    late_starts: np.ndarray  # first frame of late swing, per stride
    bands: dict
    swing: np.ndarray
    moments: object  # dynamics.JointMoments, or None without body mass


@dataclass(frozen=True)
class LegSignals:
    """One leg's per-frame signals by name: joint signals ``joint[name]`` [..., F] and per-muscle signals
    ``muscle[name]`` [..., F, muscle] (muscles in ``muscles.MUSCLES`` order); the same names after
    time-normalisation, with a leading stride axis.

    A dataclass of named numpy arrays rather than an xarray Dataset: the two kinds of signal share only the frame
    axis, and the squad workers then need no further import (xarray and its pandas indexes cost more to import
    than a trial's analysis takes).
    """

    joint: Mapping[str, np.ndarray]
    muscle: Mapping[str, np.ndarray]

    JOINT = ("hip_flexion_deg", "hip_adduction_deg", "knee_flexion_deg", "hip_moment_nm_per_kg",
             "knee_moment_nm_per_kg")
    MUSCLE = ("length_m", "strain_pct", "fibre_length_lopt", "velocity_lopt_per_s", "force_n", "power_w")

    def stacked(self) -> np.ndarray:
        """[..., F, joint signals + muscle signals x muscles]: every signal as a column, for one call of a
        routine that works column-wise (time normalisation)."""
        return np.concatenate([np.stack([self.joint[n] for n in self.JOINT], axis=-1)]
                              + [self.muscle[n] for n in self.MUSCLE], axis=-1)

    @classmethod
    def from_stacked(cls, columns: np.ndarray, n_muscles: int) -> "LegSignals":
        """The inverse of :meth:`stacked` (any leading axes)."""
        n_joint = len(cls.JOINT)
        joint = {n: columns[..., k] for k, n in enumerate(cls.JOINT)}
        muscle = {n: columns[..., n_joint + k * n_muscles:n_joint + (k + 1) * n_muscles]
                  for k, n in enumerate(cls.MUSCLE)}
        return cls(joint, muscle)

    @classmethod
    def concatenate(cls, legs: "list[LegSignals]", axis: int = 0) -> "LegSignals":
        """The legs' signals one after another along ``axis`` (frames, or strides after normalisation)."""
        return cls({n: np.concatenate([leg.joint[n] for leg in legs], axis=axis) for n in cls.JOINT},
                   {n: np.concatenate([leg.muscle[n] for leg in legs], axis=axis) for n in cls.MUSCLE})


class _LegTable(NamedTuple):
    """What one leg gives the strides table (see ``_stride_columns``)."""

    side: str
    strides: list
    late_starts: np.ndarray  # first frame of late swing, per stride
    signals: LegSignals  # the curve signals, per frame
    bands: dict  # muscle -> (strain %, l/l_opt) 5th/95th percentiles, each [2, strides]; empty without a band
    unmet: np.ndarray  # [F, 2] swing frames whose hip-extension / knee-flexion demand the muscles could not meet
    velocities: np.ndarray  # [F, muscles] musculotendon lengthening velocity (m/s)
    shortfall: np.ndarray  # [F, 2] unmet hip-extension and knee-flexion moment (N m/kg, >= 0), NaN off swing
    force_bands: dict  # (peak force, negative work) -> [2 (p5, p95), strides, muscles]; empty without a band


def _muscle_tables(trial, body, angles, valid, options, athlete, body_mass, speed, info):
    """Muscles and dynamics per side over the whole trial, then per-stride peaks and the normalised curves."""
    from .dynamics import (BandLeg, SwingLeg, force_work_band, leg_inertia, share_swing_moments_of_legs,
                           swing_inverse_dynamics_of_legs)
    from .muscles import MUSCLES, MuscleDims, monte_carlo_peaks, muscle_states_of_legs, stature_from_dims
    from .strides import normalise_strides

    rate = trial.rate_hz
    n_frames = trial.n_frames
    table_legs = []  # per side: what the strides table needs, made into one table for both legs at the end
    curve_blocks: list[LegSignals] = []  # per leg: [stride, 101, ...]
    curve_keys: list[tuple[str, int]] = []
    dims_body = body.dims
    unmet_total = 0
    sides = [side for side in SIDES if any(s.side == side for s in valid)]
    joints = {side: {k: angles[side][k] for k in ("hip_flexion", "hip_adduction", "hip_rotation", "knee_flexion")}
              for side in sides}
    leg_dims = {side: MuscleDims(pelvis_width_m=dims_body.pelvis_width_m, pelvis_depth_m=dims_body.pelvis_depth_m,
                                 thigh_length_m=dims_body.thigh_length_m[side],
                                 shank_length_m=dims_body.shank_length_m[side]) for side in sides}
    leg_states = dict(zip(sides, muscle_states_of_legs([(joints[side], leg_dims[side]) for side in sides], rate,
                                                       body_mass_kg=body_mass, height_m=athlete.height_m,
                                                       strength_factor=athlete.strength_factor)))
    legs = {}  # per side: what the tables need, gathered first so both legs share one force-sharing solve
    for side in sides:
        side_strides = [s for s in valid if s.side == side]
        joint, dims, states = joints[side], leg_dims[side], leg_states[side]
        late_starts = np.array([_late_swing_start_frame(s, rate) for s in side_strides])
        # The band is only read at late-swing peaks: each sample's peak per stride, 5th/95th percentiles over samples.
        bands = {}
        if options.monte_carlo_samples > 0:
            windows = [(late, s.end_frame + 1) for late, s in zip(late_starts, side_strides)]
            peaks = monte_carlo_peaks(joint, windows, dims, n_samples=options.monte_carlo_samples, seed=0,
                                      nominal_lengths_m={m: states[m].length_m for m in MUSCLES})
            # 5th/95th percentiles of every muscle's peaks in one call: [2 (p5, p95), muscle, strain | l/l_opt, stride]
            q = np.percentile(np.stack([np.stack([100.0 * peaks[m][0], peaks[m][1]], axis=1) for m in MUSCLES],
                                      axis=1), (5, 95), axis=0)
            bands = {m: (q[:, k, 0], q[:, k, 1]) for k, m in enumerate(MUSCLES)}  # each [2, strides]
        swing = np.zeros(n_frames, dtype=bool)
        if body_mass:
            for s in side_strides:
                lo = int(np.ceil(s.toe_off_s * rate))
                hi = int(np.floor(s.next_foot_strike_s * rate))
                swing[max(lo, 0):min(hi, n_frames - 1) + 1] = True
        legs[side] = _Leg(side_strides, joint, states, late_starts, bands, swing, None)
    if body_mass:  # both legs' swing inverse dynamics in one pass
        swinging = [SwingLeg(body.thigh[side], body.shank[side], body.foot[side], body.hip_centre[side],
                             body.knee_centre[side], body.ankle_centre[side], body.heel[side], body.toe[side],
                             leg_inertia(body_mass, athlete.sex, dims_body.thigh_length_m[side],
                                         dims_body.shank_length_m[side], dims_body.foot_length_m[side]),
                             legs[side].swing, side) for side in sides]
        for side, moments in zip(sides, swing_inverse_dynamics_of_legs(swinging, rate, pelvis=body.pelvis)):
            legs[side] = legs[side]._replace(moments=moments)
    with_moments = [side for side, leg in legs.items() if leg.moments is not None]
    shared = dict(zip(with_moments, share_swing_moments_of_legs(
        [(legs[side].moments, legs[side].states, legs[side].joint, rate) for side in with_moments]))) \
        if with_moments else {}
    _short_fibre_warning(sides, valid, leg_states, shared, legs, info)
    force_bands = {}
    if with_moments and options.force_band_samples > 0:
        band_legs = []
        for side in with_moments:
            leg = legs[side]
            stops = np.array([s.end_frame for s in leg.strides], dtype=int)
            starts = np.array([min(max(int(np.ceil(s.toe_off_s * rate)), s.start_frame), s.end_frame)
                               for s in leg.strides], dtype=int)
            force_norm = {m: shared[side].force_n[m] / leg.states[m].max_isometric_force_n for m in MUSCLES}
            band_legs.append(BandLeg(leg.moments, leg.joint, leg_dims[side], starts, stops, force_norm,
                                     shared[side].dual))
        height = athlete.height_m or stature_from_dims(leg_dims[with_moments[0]])
        force_bands = dict(zip(with_moments, force_work_band(
            band_legs, rate, body_mass_kg=body_mass, height_m=height, strength_factor=athlete.strength_factor,
            n_samples=max(2, int(options.force_band_samples)))))
    def per_muscle(values):  # {muscle: [F]} -> [F, muscle]
        return np.column_stack([values[m] for m in MUSCLES])

    for side, (side_strides, joint, states, late_starts, bands, swing, moments) in legs.items():
        a = angles[side]
        forces = {m: np.full(n_frames, np.nan) for m in MUSCLES}
        hip_moment = np.full(n_frames, np.nan)
        knee_moment = np.full(n_frames, np.nan)
        unmet = np.zeros((n_frames, 2), dtype=bool)
        shortfall = np.full((n_frames, 2), np.nan)
        if side in shared:
            hip_moment = moments.hip_flexion_nm / body_mass
            knee_moment = moments.knee_flexion_nm / body_mass
            sh = shared[side]
            forces_side = sh.force_n
            unmet = np.column_stack([sh.hip_extension_unmet, sh.knee_flexion_unmet])
            shortfall = np.column_stack([np.clip(-sh.reserve_nm[:, 0], 0.0, None),
                                         np.clip(sh.reserve_nm[:, 1], 0.0, None)]) / body_mass
            unmet_total += int(np.sum(sh.hamstring_demand_unmet))
            for m in MUSCLES:
                if m in forces_side:
                    forces[m] = np.where(swing, forces_side[m], np.nan)
        hip_deg = np.degrees(a["hip_flexion"])
        knee_deg = np.degrees(a["knee_flexion"])
        strain_pct = {m: 100.0 * states[m].strain for m in MUSCLES}
        power = {m: -forces[m] * states[m].velocity_m_per_s for m in MUSCLES}  # delivered; negative = absorbing
        signals = LegSignals(
            {"hip_flexion_deg": hip_deg, "hip_adduction_deg": np.degrees(a["hip_adduction"]),
             "knee_flexion_deg": knee_deg, "hip_moment_nm_per_kg": hip_moment, "knee_moment_nm_per_kg": knee_moment},
            {"length_m": per_muscle({m: states[m].length_m for m in MUSCLES}), "strain_pct": per_muscle(strain_pct),
             "fibre_length_lopt": per_muscle({m: states[m].fibre_length_lopt for m in MUSCLES}),
             "velocity_lopt_per_s": per_muscle({m: states[m].velocity_lopt_per_s for m in MUSCLES}),
             "force_n": per_muscle(forces), "power_w": per_muscle(power)})
        table_legs.append(_LegTable(side, side_strides, late_starts, signals, bands, unmet,
                                    per_muscle({m: states[m].velocity_m_per_s for m in MUSCLES}), shortfall,
                                    force_bands.get(side, {})))
        curve_blocks.append(LegSignals.from_stacked(normalise_strides(signals.stacked(), side_strides, rate),
                                                    len(MUSCLES)))
        curve_keys.extend((side, s.index + 1) for s in side_strides)
    stride_columns = _stride_columns(table_legs, rate, bool(body_mass), speed, athlete, trial.name)
    curves = _curve_columns(curve_blocks, curve_keys, athlete, trial.name, MUSCLES)
    info["frames_moments_not_met"] = unmet_total
    if not body_mass:
        info["warnings"].append("body mass missing: forces and work need it; add it to athletes.csv or use --body-mass")
        info["warning_codes"].append("no_body_mass")
    return {name: stride_columns[name] for name in STRIDE_COLUMNS}, curves


def _short_fibre_warning(sides, valid, leg_states, shared, legs, info) -> None:
    """Warn when a hamstring carries force (at least ``SHORT_FIBRE_FORCE_FRACTION`` of F0) with its fibres below
    ``SHORT_FIBRE_LOPT`` during the valid strides (fibre length at the model's own force, compliant tendon).

    Unloaded, the model's semimembranosus and biceps femoris long head fibres fall below 0.5 l_opt in mid-swing
    (knee flexed 120-130 deg; the unit is then shorter than its slack tendon plus fibres); no force depends on
    that, so it is stated in DEVELOPERS.md rather than warned on every trial."""
    from .muscles import MUSCLES

    short = []
    for side in sides:
        if side not in shared or shared[side].fibre_length_lopt is None:
            continue
        frames = np.concatenate([np.arange(s.start_frame, s.end_frame + 1) for s in valid if s.side == side])
        for m in MUSCLES:
            lopt = shared[side].fibre_length_lopt[m][frames]
            loaded = shared[side].force_n[m][frames] >= SHORT_FIBRE_FORCE_FRACTION * \
                leg_states[side][m].max_isometric_force_n
            bad = loaded & (lopt < SHORT_FIBRE_LOPT)
            if bad.any():
                short.append(f"{side} {m} {float(lopt[bad].min()):.2f}")
    if short:
        info["warnings"].append(
            f"a loaded hamstring's modelled fibre length falls below {SHORT_FIBRE_LOPT:g} of optimal length (the "
            f"low end of the active range): {', '.join(short)} l_opt. Forces there are unreliable; check the "
            "athlete's height and segment lengths (the model's tendon slack lengths follow from them)")
        info["warning_codes"].append("short_fibres")


def _stride_columns(legs: list[_LegTable], rate, with_mass, speed, athlete, trial_name) -> dict[str, np.ndarray]:
    """The strides table as columns: a row per stride and muscle (stride-major, legs in turn), every window of both
    legs at once: the legs' frames are stacked, each window offset to its leg."""
    from .dynamics import window_work
    from .metrics import window_peaks
    from .muscles import MUSCLES

    n_mus = len(MUSCLES)
    strides = [s for leg in legs for s in leg.strides]
    n_str = len(strides)
    n_frames = legs[0].signals.joint["hip_flexion_deg"].shape[0]
    offset = np.repeat(np.arange(len(legs)) * n_frames, [len(leg.strides) for leg in legs])  # frame offset per stride
    start = np.array([s.start_frame for s in strides], dtype=int) + offset
    stop = np.array([s.end_frame for s in strides], dtype=int) + offset
    late = np.concatenate([np.asarray(leg.late_starts, dtype=int) for leg in legs]) + offset
    swing_lo = np.minimum(np.maximum(np.ceil(np.array([s.toe_off_s for s in strides]) * rate).astype(int) + offset,
                                     start), stop)
    foot_strike = np.array([s.foot_strike_s for s in strides])
    stride_time = np.array([s.stride_time_s for s in strides])
    signals = LegSignals.concatenate([leg.signals for leg in legs])  # legs' frames one after the other
    joint, muscle = signals.joint, signals.muscle
    # peaks over late swing (strain, l/l_opt), over swing (velocity, knee flexion, force) and over the stride
    late_peaks, late_at = window_peaks(np.concatenate([muscle["strain_pct"], muscle["fibre_length_lopt"]], axis=1),
                                       late, stop)
    peak_strain, peak_lopt, i_peak = late_peaks[:, :n_mus], late_peaks[:, n_mus:], late_at[:, :n_mus] - offset[:, None]
    swing_peaks, _ = window_peaks(np.concatenate([muscle["velocity_lopt_per_s"], joint["knee_flexion_deg"][:, None],
                                                  muscle["force_n"]], axis=1), swing_lo, stop)
    peak_vel, peak_knee, peak_force = swing_peaks[:, :n_mus], swing_peaks[:, n_mus], swing_peaks[:, n_mus + 1:]
    with np.errstate(invalid="ignore"):
        peak_time = np.where(i_peak >= 0, 100.0 * (i_peak / rate - foot_strike[:, None]) / stride_time[:, None],
                             np.nan)
    unmet = np.concatenate([leg.unmet for leg in legs])  # [legs x F, 2] hip extension, knee flexion
    n_late = stop + 1 - late

    def met_pct(short):  # % of the late-swing frames [late, stop] without a shortfall
        met = np.concatenate([[0], np.cumsum(~short)])
        return 100.0 * (met[stop + 1] - met[late]) / n_late if with_mass else np.full(n_str, np.nan)

    late_met = met_pct(unmet.any(axis=1))
    reserve_peaks, _ = window_peaks(np.concatenate([leg.shortfall for leg in legs]), late, stop)
    status = np.where(late_met >= 100.0, "met",
                      np.where(late_met >= FORCE_STATUS_MOSTLY_MET_PCT, "mostly_met", "not_met")).astype(object)
    if not with_mass:
        status[:] = "no_body_mass"
    nan = np.full((n_str, n_mus), np.nan)

    def per_stride(values):
        return np.repeat(np.asarray(values), n_mus)

    columns = {
        "athlete": per_stride([athlete.athlete] * n_str), "session": per_stride([athlete.session] * n_str),
        "trial": per_stride([trial_name] * n_str), "side": per_stride([s.side for s in strides]),
        "stride": per_stride([s.index + 1 for s in strides]),
        "muscle": np.tile(np.array(MUSCLES), n_str),
        "foot_strike_s": per_stride(foot_strike), "toe_off_s": per_stride([s.toe_off_s for s in strides]),
        "next_foot_strike_s": per_stride([s.next_foot_strike_s for s in strides]),
        "stride_time_s": per_stride(stride_time), "toe_off_pct": per_stride([s.toe_off_pct for s in strides]),
        "late_swing_start_pct": per_stride([s.late_swing_start_pct for s in strides]),
        "event_source": per_stride([s.event_source for s in strides]),
        "speed_m_s": per_stride([speed] * n_str),
        "peak_hip_flexion_deg": per_stride(window_peaks(joint["hip_flexion_deg"], start, stop)[0]),
        "peak_knee_flexion_deg": per_stride(peak_knee),
        "late_swing_moments_met_pct": per_stride(late_met),
        "late_swing_hip_extension_met_pct": per_stride(met_pct(unmet[:, 0])),
        "late_swing_knee_flexion_met_pct": per_stride(met_pct(unmet[:, 1])),
        "peak_hip_extension_reserve_nm_per_kg": per_stride(reserve_peaks[:, 0] if with_mass else np.full(n_str, np.nan)),
        "peak_knee_flexion_reserve_nm_per_kg": per_stride(reserve_peaks[:, 1] if with_mass else np.full(n_str, np.nan)),
        "force_status": per_stride(status),
        "peak_strain_pct": peak_strain.ravel(), "peak_strain_time_pct": peak_time.ravel(),
        "peak_fibre_length_lopt": peak_lopt.ravel(), "peak_lengthening_velocity_lopt_per_s": peak_vel.ravel(),
    }
    for name, source, q in (("peak_strain_p5_pct", 0, 0), ("peak_strain_p95_pct", 0, 1),
                            ("peak_fibre_length_lopt_p5", 1, 0), ("peak_fibre_length_lopt_p95", 1, 1)):
        columns[name] = np.concatenate([np.column_stack([leg.bands[m][source][q] for m in MUSCLES]) if leg.bands
                                        else nan[:len(leg.strides)] for leg in legs]).ravel()
    if with_mass:
        force = muscle["force_n"]
        velocity = np.concatenate([leg.velocities for leg in legs])
        absorbed, produced = window_work(np.nan_to_num(force), velocity, rate, swing_lo, stop)
        columns.update(peak_force_n=peak_force.ravel(), negative_work_j=absorbed.ravel(),
                       positive_work_j=produced.ravel())
    else:
        columns.update(peak_force_n=nan.ravel(), negative_work_j=nan.ravel(), positive_work_j=nan.ravel())
    for k, metric in enumerate(("peak_force_n", "negative_work_j")):
        for q, suffix in enumerate(("p5", "p95")):
            columns[f"{metric}_{suffix}"] = np.concatenate([
                leg.force_bands[metric][q] if leg.force_bands else nan[:len(leg.strides)] for leg in legs]).ravel()
    return columns


def _curve_columns(blocks: list[LegSignals], keys: list[tuple[str, int]], athlete, trial: str,
                   muscles) -> dict[str, np.ndarray]:
    """One long table for the trial, as columns: a row per stride, muscle and percent of the cycle."""
    if not keys:
        return {}
    curves = LegSignals.concatenate(blocks)  # joint [stride, 101], muscle [stride, 101, muscle]
    n_str, n_pct = curves.joint["hip_flexion_deg"].shape
    n_mus = len(muscles)
    rows = n_str * n_mus * n_pct
    columns = {
        "athlete": np.full(rows, athlete.athlete), "session": np.full(rows, athlete.session),
        "trial": np.full(rows, trial),
        "side": np.repeat(np.array([k[0] for k in keys]), n_mus * n_pct),
        "stride": np.repeat([k[1] for k in keys], n_mus * n_pct),
        "muscle": np.tile(np.repeat(np.array(list(muscles)), n_pct), n_str),
        "pct": np.tile(np.linspace(0.0, 100.0, n_pct), n_str * n_mus),
    }
    # rows: stride, then muscle, then percent of the cycle
    columns.update((name, np.repeat(values[:, None, :], n_mus, axis=1).reshape(rows))
                   for name, values in curves.joint.items())
    columns.update((name, values.transpose(0, 2, 1).reshape(rows)) for name, values in curves.muscle.items())
    return {name: columns[name] for name in CURVE_COLUMNS}
