"""Resolve anatomical landmarks from C3D labels.

A marker map (TOML) names the C3D label of each landmark; without one, hamstride's own default labels are used
(``r.asis``, ``l.knee.lat``, ...). Capture software often writes labels as ``SUBJECT:LABEL`` (``Ath07:r.asis``): a
label without a prefix matches the file's label with or without one, so one map serves a whole squad. A file holding
two subjects' markers needs a map that names the prefix (``prefix = "Ath07"``, or prefixed labels). The result is a frozen :class:`Landmarks` with NaN for missing frames, plus a
per-landmark report (label used, percent of valid frames) that ``hamstride landmarks`` prints.
"""
from __future__ import annotations

import difflib
import tomllib
from dataclasses import dataclass, field, replace as dc_replace
from pathlib import Path
from typing import Mapping

import numpy as np

from .errors import ConfigError, LandmarkError
from .c3d import MarkerTrial
from .numerics import SIDES, finite_points, runs_1d

__all__ = ["REQUIRED_SITES", "OPTIONAL_SITES", "CLUSTER_SEGMENTS", "DEFAULT_LABELS", "DEFAULT_CLUSTERS",
           "REQUIRED_LANDMARKS", "CLUSTER_SITES", "STATIC_RECOVERABLE", "MIN_VISIBLE_RUN_S", "plain_name",
           "MarkerMap", "load_marker_map", "LandmarkReport", "Landmarks", "recoverable_landmarks", "VisibleWindow",
           "visible_window", "crop_landmarks", "crop_trial", "split_prefix", "resolve_landmarks"]

REQUIRED_SITES = ("asis", "psis", "lateral_epicondyle", "medial_epicondyle", "lateral_malleolus", "medial_malleolus",
                  "heel", "first_metatarsal", "fifth_metatarsal")
OPTIONAL_SITES = ("toe_tip",)
CLUSTER_SEGMENTS = ("thigh", "shank")

# hamstride's own default labels: lower case, dotted, side letter first.
_DEFAULT_SITE_LABELS = {
    "asis": "asis", "psis": "psis", "lateral_epicondyle": "knee.lat", "medial_epicondyle": "knee.med",
    "lateral_malleolus": "ankle.lat", "medial_malleolus": "ankle.med", "heel": "heel", "first_metatarsal": "met1",
    "fifth_metatarsal": "met5", "toe_tip": "toe",
}
DEFAULT_LABELS: dict[str, str] = {f"{side}_{site}": f"{side[0]}.{label}" for side in SIDES
                                  for site, label in _DEFAULT_SITE_LABELS.items()}
DEFAULT_CLUSTERS: dict[str, tuple[str, ...]] = {f"{side}_{seg}_cluster": tuple(f"{side[0]}.{seg}.{k}" for k in "abc")
                                                for side in SIDES for seg in CLUSTER_SEGMENTS}
REQUIRED_LANDMARKS = tuple(f"{side}_{site}" for side in SIDES for site in REQUIRED_SITES)
# Landmarks a static trial can rebuild from a cluster on their segment (rigid fit in the segments stage): the
# epicondyles from a thigh cluster, the malleoli from a shank cluster, lateral and medial alike.
CLUSTER_SITES = {"thigh": ("lateral_epicondyle", "medial_epicondyle"),
                 "shank": ("lateral_malleolus", "medial_malleolus")}
STATIC_RECOVERABLE = tuple(f"{side}_{site}" for side in SIDES for sites in CLUSTER_SITES.values() for site in sites)
# The visible window (overground capture volumes) runs from the athlete's entry to their exit: stretches shorter than
# this with every required landmark seen are flicker at the volume's edge, not the athlete inside (design choice).
MIN_VISIBLE_RUN_S = 0.05


def plain_name(landmark: str) -> str:
    """'right_lateral_epicondyle' -> 'right lateral epicondyle' (for messages)."""
    return landmark.replace("_", " ")


@dataclass(frozen=True)
class MarkerMap:
    """Landmark name -> C3D label, and cluster name -> labels."""

    landmarks: Mapping[str, str] = field(default_factory=lambda: dict(DEFAULT_LABELS))
    clusters: Mapping[str, tuple[str, ...]] = field(default_factory=lambda: dict(DEFAULT_CLUSTERS))
    source: str = "default labels"
    prefix: str = ""  # subject prefix tried first for labels without one ('Ath07' -> 'Ath07:r.asis')


def load_marker_map(path: str | Path | None) -> MarkerMap:
    """Read a TOML marker map; landmarks it does not name keep their default labels."""
    if path is None:
        return MarkerMap()
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"marker map {path} not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"marker map {path} is not valid TOML: {exc}") from None
    landmarks = dict(DEFAULT_LABELS)
    known = set(DEFAULT_LABELS)
    for key, label in (data.get("landmarks") or {}).items():
        if key not in known:
            close = difflib.get_close_matches(key, known, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise ConfigError(f"marker map {path.name}: unknown landmark '{key}'{hint}")
        if not isinstance(label, str) or not label.strip():
            raise ConfigError(f"marker map {path.name}: landmark '{key}' needs a label string")
        landmarks[key] = label.strip()
    clusters = dict(DEFAULT_CLUSTERS)
    for key, labels in (data.get("clusters") or {}).items():
        if key not in DEFAULT_CLUSTERS:
            raise ConfigError(f"marker map {path.name}: unknown cluster '{key}' (use e.g. right_thigh_cluster)")
        if not isinstance(labels, list) or not all(isinstance(x, str) for x in labels) or len(labels) < 3:
            raise ConfigError(f"marker map {path.name}: cluster '{key}' needs a list of at least 3 labels")
        clusters[key] = tuple(labels)
    prefix = data.get("prefix", "")
    if not isinstance(prefix, str):
        raise ConfigError(f"marker map {path.name}: prefix must be a string such as \"Ath07\"")
    return MarkerMap(landmarks, clusters, source=str(path), prefix=prefix.strip().rstrip(":"))


@dataclass(frozen=True)
class LandmarkReport:
    """How one landmark resolved."""

    landmark: str
    label: str | None
    valid_pct: float
    required: bool
    note: str = ""


@dataclass(frozen=True)
class Landmarks:
    """Named anatomical points in the internal lab frame (metres, NaN = missing)."""

    trial: str
    rate_hz: float
    points: Mapping[str, np.ndarray]  # name -> [F, 3]
    clusters: Mapping[str, np.ndarray] = field(default_factory=dict)  # name -> [F, k, 3]
    labels_used: Mapping[str, str] = field(default_factory=dict)
    report: tuple[LandmarkReport, ...] = ()

    @property
    def n_frames(self) -> int:
        return int(next(iter(self.points.values())).shape[0]) if self.points else 0

    def has(self, name: str) -> bool:
        return name in self.points

    def point(self, name: str) -> np.ndarray:
        try:
            return self.points[name]
        except KeyError:
            raise LandmarkError(f"landmark {plain_name(name)} is not available; map it in markers.toml",
                                trial=self.trial, code="landmark_missing") from None

    def replace(self, **changes) -> "Landmarks":
        return dc_replace(self, **changes)


def recoverable_landmarks(marker_map: MarkerMap, static_lm: "Landmarks", trial: MarkerTrial) -> tuple[str, ...]:
    """Required landmarks a static trial can rebuild in ``trial``: those on a segment whose cluster is in the static
    trial and whose cluster labels are all in the trial."""
    finder = _LabelFinder(trial.labels, marker_map.prefix)  # the same matching as resolve_landmarks (prefixes, case)
    out = []
    for side in SIDES:
        for segment, sites in CLUSTER_SITES.items():
            name = f"{side}_{segment}_cluster"
            cluster = marker_map.clusters.get(name, ())
            if name in static_lm.clusters and cluster and all(finder.find(lab) is not None for lab in cluster):
                out += [f"{side}_{site}" for site in sites]
    return tuple(out)


@dataclass(frozen=True)
class VisibleWindow:
    """Frames ``start`` .. ``stop - 1`` of a file of ``n_frames``: where every required landmark is seen."""

    start: int
    stop: int
    n_frames: int
    rate_hz: float

    @property
    def whole(self) -> bool:
        return self.start == 0 and self.stop == self.n_frames

    @property
    def start_s(self) -> float:
        return self.start / self.rate_hz

    @property
    def end_s(self) -> float:
        return (self.stop - 1) / self.rate_hz

    @property
    def duration_s(self) -> float:
        return (self.stop - 1 - self.start) / self.rate_hz

    def describe(self) -> str:
        total = self.n_frames / self.rate_hz
        return f"{self.start_s:.2f}-{self.end_s:.2f} s ({self.duration_s:.2f} s of {total:.2f} s)"


def visible_window(lm: "Landmarks", max_gap_frames: int = 10, *,
                   min_run_s: float = MIN_VISIBLE_RUN_S) -> VisibleWindow:
    """The analysed window of an overground capture: from the first to the last frame in which every required
    landmark is seen (markers appear as the athlete enters the capture volume and vanish as they leave).

    Gaps of up to ``max_gap_frames`` inside are bridged (they are filled later), and stretches shorter than
    ``min_run_s`` with every landmark seen do not open or close the window (flicker at the volume's edge). Longer
    gaps inside the window stay gaps and are judged as such. The whole trial when no stretch qualifies (the gap
    checks then say what is missing).
    """
    n = lm.n_frames
    whole = VisibleWindow(0, n, n, float(lm.rate_hz))
    names = [name for name in REQUIRED_LANDMARKS if name in lm.points]
    if not names or n == 0:
        return whole
    seen = np.all([finite_points(np.asarray(lm.points[name], float)) for name in names], axis=0)
    starts, stops = runs_1d(seen).T
    if starts.size == 0:
        return whole
    # bridge short interior gaps, then keep stretches long enough to be the athlete inside the volume
    keep = np.concatenate([[True], (starts[1:] - stops[:-1]) > max_gap_frames])
    group = np.cumsum(keep) - 1
    run_start = starts[keep]
    run_stop = np.array([stops[group == g].max() for g in range(len(run_start))])
    long_enough = (run_stop - run_start) >= max(int(round(min_run_s * lm.rate_hz)), 2)
    if not long_enough.any():
        return whole
    return VisibleWindow(int(run_start[long_enough][0]), int(run_stop[long_enough][-1]), n, float(lm.rate_hz))


def crop_landmarks(lm: "Landmarks", window: VisibleWindow, *, keep_clusters: bool = True) -> "Landmarks":
    """The landmarks (and clusters) of frames ``window.start`` .. ``window.stop - 1``."""
    sl = slice(window.start, window.stop)
    return lm.replace(points={k: v[sl] for k, v in lm.points.items()},
                      clusters={k: v[sl] for k, v in lm.clusters.items()} if keep_clusters else {})


def crop_trial(trial: MarkerTrial, window: VisibleWindow) -> MarkerTrial:
    """The trial's frames ``window.start`` .. ``window.stop - 1``, its time starting again at 0 s there (the file's
    events shifted with it; those outside the window dropped)."""
    t0, t1 = window.start_s, window.end_s
    events = tuple(dc_replace(ev, time_s=ev.time_s - t0) for ev in trial.events if t0 <= ev.time_s <= t1)
    return dc_replace(trial, xyz=trial.xyz[window.start:window.stop], first_frame=trial.first_frame + window.start,
                      events=events)


def _suggest(label: str, labels: tuple[str, ...]) -> str:
    close = difflib.get_close_matches(label, labels, n=3, cutoff=0.4)
    lowered = {lab.lower(): lab for lab in labels}
    close += [lowered[c] for c in difflib.get_close_matches(label.lower(), list(lowered), n=3, cutoff=0.4)
              if lowered[c] not in close]
    return f"; labels in the file that look close: {', '.join(close[:3])}" if close else ""


def split_prefix(label: str) -> tuple[str, str]:
    """'Ath07:r.asis' -> ('Ath07', 'r.asis'); 'r.asis' -> ('', 'r.asis') (the subject prefix capture software adds)."""
    prefix, _, bare = label.rpartition(":")
    return prefix, bare


class _LabelFinder:
    """Finds a map label among the file's labels: exactly, ignoring case, then (for a label without a prefix) as the
    part after any ``SUBJECT:`` prefix. Records labels that match markers of more than one subject."""

    def __init__(self, labels: tuple[str, ...], prefix: str = ""):
        self.labels = labels
        self.prefix = prefix
        self.exact = {label: i for i, label in reversed(list(enumerate(labels)))}
        self.folded = {label.lower(): i for i, label in reversed(list(enumerate(labels)))}
        self.bare: dict[str, list[tuple[str, int]]] = {}
        for i, label in enumerate(labels):
            prefix_i, bare = split_prefix(label)
            self.bare.setdefault(bare.lower(), []).append((prefix_i, i))
        self.ambiguous: dict[str, list[str]] = {}

    def find(self, label: str) -> int | None:
        tries = ([f"{self.prefix}:{label}"] if self.prefix and ":" not in label else []) + [label]
        for text in tries:
            i = self.exact.get(text, self.folded.get(text.lower()))
            if i is not None:
                return i
        if ":" in label:
            return None
        matches = self.bare.get(label.lower(), [])
        if len({p for p, _ in matches}) > 1:
            self.ambiguous[label] = [self.labels[i] for _, i in matches]
        return matches[0][1] if matches else None


def resolve_landmarks(trial: MarkerTrial, marker_map: MarkerMap | None = None, *,
                      allow_missing: tuple[str, ...] = ()) -> Landmarks:
    """Pick each landmark's marker from the trial. Raises LandmarkError naming every required landmark not found.

    ``allow_missing`` lists required landmarks that may be absent (e.g. medial markers recoverable from a static
    trial); they are reported but not fatal.
    """
    marker_map = marker_map or MarkerMap()
    finder = _LabelFinder(trial.labels, marker_map.prefix)
    points: dict[str, np.ndarray] = {}
    used: dict[str, str] = {}
    report: list[LandmarkReport] = []
    missing: list[str] = []
    n = max(trial.n_frames, 1)
    for name, label in marker_map.landmarks.items():
        required = name in REQUIRED_LANDMARKS
        i = finder.find(label)
        if i is None:
            report.append(LandmarkReport(name, None, 0.0, required, f"label '{label}' not in file"))
            if required and name not in allow_missing:
                missing.append(f"{plain_name(name)} (label '{label}'{_suggest(label, trial.labels)})")
            continue
        xyz = trial.xyz[:, i, :]
        points[name] = xyz
        used[name] = trial.labels[i]
        valid = 100.0 * finite_points(xyz).sum() / n
        report.append(LandmarkReport(name, trial.labels[i], float(valid), required))
    clusters: dict[str, np.ndarray] = {}
    for name, labels in marker_map.clusters.items():
        idx = [finder.find(lab) for lab in labels]
        if all(i is not None for i in idx):
            clusters[name] = trial.xyz[:, idx, :]
    if finder.ambiguous:
        label, found = next(iter(finder.ambiguous.items()))
        subjects = sorted({split_prefix(x)[0] or "(no prefix)" for v in finder.ambiguous.values() for x in v})
        first = next((s for s in subjects if s != "(no prefix)"), subjects[0])
        raise LandmarkError(
            f"the file holds markers of {len(subjects)} subjects ({', '.join(subjects)}): label '{label}' matches "
            f"{' and '.join(repr(x) for x in found[:3])}. Say whose markers to analyse in a markers.toml: "
            f'prefix = "{first}" (or prefixed labels in [landmarks], e.g. right_asis = "{first}:r.asis"), and '
            f"rerun with --markers", trial=trial.name, code="several_subjects")
    if missing:
        static_hint = ""
        if any(name in STATIC_RECOVERABLE and name not in points and name not in allow_missing
               for name in marker_map.landmarks):
            static_hint = ("; knee and ankle markers placed only in the static trial are rebuilt from the thigh and "
                           "shank clusters when the static trial is given (--static, or static*.c3d in the session)")
        raise LandmarkError("required landmark(s) not found: " + "; ".join(missing)
                            + f". Map them in a markers.toml ([landmarks] section) — using {marker_map.source}"
                            + static_hint, trial=trial.name, code="landmark_missing")
    return Landmarks(trial=trial.name, rate_hz=trial.rate_hz, points=points, clusters=clusters, labels_used=used,
                     report=tuple(report))
