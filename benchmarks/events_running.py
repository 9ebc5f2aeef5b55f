"""Print the marker rule's foot-strike and toe-off errors on the running-feet generator (issue 13 acceptance table).

Usage: python benchmarks/events_running.py [seeds] [--event-cutoffs | --onset-study]
Each trial goes through the C3D writer and reader, the lab frame, landmark resolution and the default filtering (no
force plates, no toe marker, heel cluster), as the pipeline does. Errors are marker rule minus the contact model's
touchdown / toe-off (ms), for the contacts seen whole (truth event >= 30 ms inside the recording): |error| median,
95th percentile and max, and the signed median (bias). Issue 13 acceptance at 3.5 and 9 m/s: foot strike median
<= 5 ms and p95 <= 12 ms, toe-off median <= 10 ms and p95 <= 20 ms.
The last lines time foot strikes on the noise-free marker paths with rules whose constant is chosen with hindsight
(a height threshold on the foot's lowest landmark; Handsaker et al. 2016's acceleration peak, unfiltered), which
bounds what any rule of those kinds can reach on this generator.
--event-cutoffs instead prints the same errors at 3.5 and 9 m/s with the events detected on landmarks low-passed at
other cutoffs than the joint kinematics' (Winter's residual analysis over all markers): fixed 20-60 Hz, and the
residual analysis of the foot markers' vertical coordinates alone ("foot"). It tests whether the kinematic filter
smears the landing and lift-off that the rules time (issue 13); the answer is in events.py's docstring.
--onset-study instead times each foot strike by the onset of the landing's deceleration transient rather than its
peak (the force plate's analogue: a plate times contact by the force's onset, 20 N, not its peak), on the
acceleration of the foot landmark lowest at the impact, after the default filtering:
  "peak"      Handsaker et al. 2016's acceleration peak (the impact the rule starts from);
  "rule"      the marker rule without the changepoint (floor arrival or descent arrest near that peak);
  "3 SD"      the last instant before the peak that the acceleration rises through its swing baseline + 3 SD
              (baseline median and SD over 60-20 ms before the peak; Hodges & Bui 1996's threshold onset);
  "half-max"  the last instant before the peak that the acceleration rises through half-way from that baseline to
              the peak (the 50 % reference level instant of a transition, IEEE Std 181);
  "jerk"      the peak jerk on the rise (the steepest rise of the deceleration: the instant the floor's force
              steps in, as Handsaker et al. time toe-off by the jerk where it steps out);
  "changepoint" the marker rule as the pipeline runs it: the rule's strike refined to the touchdown changepoint of
              the unfiltered heights (events._touchdown_changepoint);
  "settled"   the rule's floor arrival (within 5 mm) measured from each landing's own settled height (the lowest
              landmark's height where it stops descending, Fellin et al. 2010's instant) instead of the trial's floor
              level: a floor level from each landing's own compression rather than the deepest stance's.
"""
from __future__ import annotations

import sys
import tempfile
from dataclasses import replace
from pathlib import Path

import numpy as np

from hamstride.events import (STRIKE_MARKERS, STRIKE_REFINE_S, STRIKE_SEARCH_S, _derivative, _floor_arrival,
                               _foot_heights, _heights_above_floor, _low_foot_mask, _strike_fallback, _strike_primary,
                               _strike_window, _window_peak, detect_events)
from hamstride.io import read_c3d
from hamstride.numerics import runs_1d
from hamstride.labframe import to_lab_frame
from hamstride.landmarks import load_marker_map, resolve_landmarks
from hamstride.signal import fill_gaps, residual_cutoff, smooth_landmarks
from hamstride.synth import RunSpec, simulate_run, write_run_trial

SIDES = ("left", "right")
SPEEDS = (2.5, 3.5, 5.0, 7.0, 9.0, 10.0)
CASES = {"default": {}, "3 mm noise": {"noise_mm": 3.0}, "6 mm wobble": {"soft_tissue_mm": 6.0}}


EVENT_CUTOFFS = (None, 20.0, 30.0, 40.0, 60.0, "foot")  # None: the kinematics' cutoff (residual, all markers)
FOOT_Z = ("heel", "first_metatarsal", "fifth_metatarsal")


def _event_cutoff(lm, choice) -> float | None:
    """The cutoff the events are detected at: None (the kinematics'), a fixed value, or 'foot': Winter's residual
    analysis of the foot markers' vertical coordinates only (the signals that carry the landing)."""
    if choice != "foot":
        return choice
    z = np.stack([np.asarray(p, float)[:, 2] for name, p in lm.points.items() if name.endswith(FOOT_Z)], axis=1)
    return residual_cutoff(fill_gaps(z)[0], lm.rate_hz)


def _trial(spec: RunSpec, cutoff=None):
    """(truth, filtered landmarks, unfiltered landmarks; lab frame) as the pipeline makes them (writer, reader, lab
    frame, filter)."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "run.c3d"
        truth = write_run_trial(path, spec)
        trial = read_c3d(path)
        _, raw = to_lab_frame(trial, resolve_landmarks(trial, load_marker_map(None)))
        lm, _ = smooth_landmarks(raw, keep_clusters=False, cutoff_hz=cutoff)
    return truth, lm, raw


def _last_crossing_up(y: np.ndarray, level: float, lo: int, hi: int) -> float:
    """Last sub-frame index in [lo, hi] where y rises through level (NaN if none)."""
    seg = y[lo:hi + 1]
    k = np.flatnonzero((seg[:-1] < level) & (seg[1:] >= level))
    if k.size == 0:
        return np.nan
    k = k[-1]
    return lo + k + (level - seg[k]) / (seg[k + 1] - seg[k])


ONSETS = ("peak", "rule", "3 SD", "half-max", "jerk", "settled", "changepoint")


def _onsets(heights, rate: float) -> list[dict[str, float]]:
    """Candidate foot-strike instants (frames) of one foot, one dict per landing (see --onset-study)."""
    rel = _heights_above_floor(heights)
    lowest = rel.min(axis=0)
    acc_all = _derivative(np.stack(list(heights.values())), 2, rate)
    jerk_all = _derivative(np.stack(list(heights.values())), 3, rate)
    acc = {m: acc_all[list(heights).index(m)] for m in STRIKE_MARKERS}
    before, after = (int(round(s * rate)) for s in STRIKE_SEARCH_S)
    refine = [int(round(s * rate)) for s in STRIKE_REFINE_S]
    settle = refine[1]
    swing = (int(round(0.06 * rate)), int(round(0.02 * rate)))
    out = []
    for start, end in runs_1d(_low_foot_mask(lowest, rate)):
        if start == 0:
            continue
        lo, hi = _strike_window(lowest, start, end, before, after, settle)
        impact = _strike_primary(acc, lo, hi)
        if impact is None:
            continue
        i = int(round(impact))
        k = int(np.argmin(rel[:, i]))  # the landmark lowest at the impact: the one landing
        a = acc_all[k]
        base = a[max(i - swing[0], 0):max(i - swing[1], 1)]
        b0, sd = np.median(base), np.std(base)
        first = max(i - swing[0], 0)
        jerk = _window_peak(jerk_all[k], max(i - int(round(0.04 * rate)), 0), i + 1)
        stop = _strike_fallback(lowest, _derivative(lowest, 1, rate), lo, hi)
        settled = None
        if stop is not None:
            floor = np.interp(stop, np.arange(lowest.size), lowest)
            settled = _floor_arrival(lowest - floor, max(i - refine[0], 0), min(i + refine[1], lowest.size))
        out.append({"peak": impact, "3 SD": _last_crossing_up(a, b0 + 3.0 * sd, first, i),
                    "half-max": _last_crossing_up(a, 0.5 * (b0 + a[i]), first, i),
                    "jerk": np.nan if jerk is None else jerk, "settled": np.nan if settled is None else settled})
    return out


def _onset_study(seeds: int) -> None:
    print("foot strike minus the contact model's touchdown (ms): |error| median, 95th percentile, signed median")
    print(f"{'case':12s} {'m/s':>4s} | " + " | ".join(f"{name + ': med  p95  bias':>24s}" for name in ONSETS))
    for case, change in CASES.items():
        for speed in (3.5, 9.0):
            errs = {name: [] for name in ONSETS}
            for seed in range(seeds):
                truth, lm, raw = _trial(replace(RunSpec(speed_m_s=speed, seed=seed), **change))
                rule = detect_events(lm).foot_strikes_s  # the rule alone, without the touchdown changepoint
                refined = detect_events(lm, unfiltered=raw).foot_strikes_s
                end = (lm.n_frames - 1) / lm.rate_hz
                for side in SIDES:
                    found = _onsets(_foot_heights(lm, side), lm.rate_hz)
                    peaks = np.array([f["peak"] for f in found]) / lm.rate_hz
                    for t in truth.foot_strikes_s[side]:
                        if not (0.03 <= t <= end - 0.03):
                            continue
                        near = found[int(np.argmin(np.abs(peaks - t)))]
                        for name in ONSETS:
                            x = {"rule": rule, "changepoint": refined}.get(name, {}).get(side)
                            x = np.array([near[name] / lm.rate_hz]) if x is None else x
                            errs[name].append(1000.0 * (x[np.argmin(np.abs(x - t))] - t))
            cells = []
            for name in ONSETS:
                e = np.asarray(errs[name], float)
                a = np.abs(e)
                cells.append(f"{np.nanmedian(a):5.1f} {np.nanpercentile(a, 95):5.1f} {np.nanmedian(e):+6.1f}")
            print(f"{case:12s} {speed:4.1f} | " + " | ".join(f"{c:>24s}" for c in cells), flush=True)


def _errors(spec: RunSpec, cutoff=None) -> tuple[np.ndarray, np.ndarray]:
    if cutoff == "foot":
        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / "run.c3d"
            write_run_trial(path, spec)
            trial = read_c3d(path)
            _, raw = to_lab_frame(trial, resolve_landmarks(trial, load_marker_map(None)))
        cutoff = _event_cutoff(raw, cutoff)
    truth, lm, raw = _trial(spec, cutoff)
    events = detect_events(lm, unfiltered=raw)  # as the pipeline calls it
    end = (lm.n_frames - 1) / lm.rate_hz
    out = []
    for true, found in ((truth.foot_strikes_s, events.foot_strikes_s), (truth.toe_offs_s, events.toe_offs_s)):
        errs = []
        for side in SIDES:
            seen = true[side][(true[side] >= 0.03) & (true[side] <= end - 0.03)]
            d = found[side]
            errs += [1000.0 * (d[np.argmin(np.abs(d - t))] - t) if d.size else np.inf for t in seen]
        out.append(np.asarray(errs))
    return out[0], out[1]


def _fmt(e: np.ndarray) -> str:
    a = np.abs(e)
    return f"{np.median(a):5.1f} {np.percentile(a, 95):5.1f} {a.max():6.1f} {np.median(e):+6.1f} {e.size:4d}"


def _hindsight_bounds(speed: float, seeds: int) -> str:
    """Best foot-strike timing on noise-free marker paths for a height threshold chosen with hindsight, and the
    acceleration peak (earliest of heel and first metatarsal within 40 ms of the truth), unfiltered."""
    low_paths, accs, truths = [], [], []
    for seed in range(seeds):
        _, _, truth = simulate_run(RunSpec(speed_m_s=speed, seed=seed))
        for side in SIDES:
            z = np.stack([truth.markers_lab[f"{side[0]}.{m}"][:, 2] for m in ("heel", "met1")])
            low = (z - np.percentile(z, 2, axis=1, keepdims=True)).min(axis=0)
            acc = _derivative(z, 2, truth.rate_hz)
            for t in truth.foot_strikes_s[side] * truth.rate_hz:
                if 20 < t < z.shape[1] - 20:
                    low_paths.append(low)
                    accs.append(acc)
                    truths.append(t)
    ms = 1000.0 / RunSpec().rate_hz

    def crossing(low, level, i0):
        lo, hi = int(i0) - 20, int(i0) + 20
        seg = low[lo:hi] - level
        k = np.flatnonzero((seg[:-1] > 0) & (seg[1:] <= 0))
        c = lo + k + seg[k] / (seg[k] - seg[k + 1])
        return c[np.argmin(np.abs(c - i0))] if k.size else np.nan

    best = (np.inf, np.inf, np.nan)
    for level_mm in np.arange(-2.0, 15.5, 0.5):
        e = np.abs([crossing(low, level_mm / 1000, t) - t for low, t in zip(low_paths, truths)]) * ms
        if np.isfinite(e).all():
            best = min(best, (np.percentile(e, 95), np.median(e), level_mm))
    peak = np.array([min(int(t) - 10 + int(np.argmax(a[k, int(t) - 10:int(t) + 10])) for k in range(2)) - t
                     for a, t in zip(accs, truths)]) * ms
    return (f"{speed:4.1f} m/s noise-free: best height threshold ({best[2]:.1f} mm) median {best[1]:.1f} / p95 "
            f"{best[0]:.1f} ms; acceleration peak median {np.median(np.abs(peak)):.1f} / p95 "
            f"{np.percentile(np.abs(peak), 95):.1f} ms (bias {np.median(peak):+.1f})")


def _cutoff_study(seeds: int) -> None:
    print(f"{'case':12s} {'m/s':>4s} {'events at':>9s} | {'foot strike: med   p95    max   bias    n':40s} | "
          f"{'toe-off: med   p95    max   bias    n'}")
    for case, change in CASES.items():
        for speed in (3.5, 9.0):
            for cutoff in EVENT_CUTOFFS:
                fs, to = zip(*(_errors(replace(RunSpec(speed_m_s=speed, seed=seed), **change), cutoff)
                               for seed in range(seeds)))
                label = "kinematic" if cutoff is None else (cutoff if cutoff == "foot" else f"{cutoff:g} Hz")
                print(f"{case:12s} {speed:4.1f} {label:>9s} | {_fmt(np.concatenate(fs)):>40s} | "
                      f"{_fmt(np.concatenate(to)):>37s}", flush=True)


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    seeds = int(args[0]) if args else 8
    if "--onset-study" in sys.argv:
        _onset_study(seeds)
        return
    if "--event-cutoffs" in sys.argv:
        _cutoff_study(seeds)
        return
    print(f"{'case':12s} {'m/s':>4s} | {'foot strike: med   p95    max   bias    n':40s} | "
          f"{'toe-off: med   p95    max   bias    n'}")
    for case, change in CASES.items():
        for speed in SPEEDS:
            fs, to = zip(*(_errors(replace(RunSpec(speed_m_s=speed, seed=seed), **change)) for seed in range(seeds)))
            print(f"{case:12s} {speed:4.1f} | {_fmt(np.concatenate(fs)):>40s} | {_fmt(np.concatenate(to)):>37s}")
    for speed in (3.5, 9.0):
        print(_hindsight_bounds(speed, seeds))


if __name__ == "__main__":
    main()
