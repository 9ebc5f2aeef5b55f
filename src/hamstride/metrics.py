"""Per-stride peaks, per-side summaries, left/right symmetry and flags.

Symmetry index (Robinson et al. 1987, from memory): SI = (R - L) / (0.5 (R + L)) x 100 %, zero when symmetric.
Limb symmetry index: LSI = involved / uninvolved x 100 %; 90 % is the common return-to-sport line (a side-to-side
difference under 10 %, MSSE 2019;51:1091). Bourne et al. 2015 (Am J Sports Med 43:2663) found eccentric knee-flexor
imbalances of 15 % and 20 % raised hamstring strain risk 2.4- and 3.4-fold.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import TYPE_CHECKING, Mapping

import numpy as np

if TYPE_CHECKING:  # pandas is imported where a table is built: the pool workers use window_peaks only
    import pandas as pd

SUMMARY_METRICS = ("peak_strain_pct", "peak_fibre_length_lopt", "peak_lengthening_velocity_lopt_per_s",
                   "negative_work_j", "peak_force_n")
SYMMETRY_METRICS = {"peak_strain": "peak_strain_pct", "peak_fibre_length": "peak_fibre_length_lopt",
                    "negative_work": "negative_work_j"}
LSI_METRICS = {"peak_strain": "peak_strain_pct", "negative_work": "negative_work_j"}
FLAG_COLUMNS = ["athlete", "session", "side", "muscle", "flag", "value", "threshold", "message"]
MUSCLE_NAMES = {"biceps_femoris_long": "biceps femoris long head", "semitendinosus": "semitendinosus", "semimembranosus": "semimembranosus",
                "biceps_femoris_short": "biceps femoris short head"}


@dataclass(frozen=True)
class FlagConfig:
    """Flag thresholds. Defaults are documented in `hamstride config`."""

    asymmetry_pct: float = 10.0  # |SI| above this: side_asymmetry (common practice from strength testing, MSSE 2019)
    asymmetry_confidence_z: float = 1.645  # one-sided 95 %: the SI must stay beyond the line after z standard errors
    guarding_lsi_pct: float = 90.0  # involved-side peak stretch below this % of the other side: involved_side_guarding
    high_stretch_limit_lopt: float = float("nan")  # fixed limit on peak l/l_opt; NaN = use the squad distribution
    high_stretch_squad_z: float = 2.0  # above squad mean + z SD (per muscle) when no fixed limit is set
    high_stretch_min_athletes: int = 4  # squad distribution needs at least this many athletes
    min_strides: int = 3  # fewer valid strides on a side: few_strides
    speed_low_fraction: float = 0.9  # session speed below this fraction of the athlete's best: speed_low
    muscles: tuple[str, ...] = ("biceps_femoris_long", "semitendinosus", "semimembranosus")  # muscles the stretch flags look at

    @classmethod
    def from_mapping(cls, data: Mapping[str, object]) -> "FlagConfig":
        known = {f.name for f in fields(cls)}
        unknown = set(data) - known
        if unknown:
            from .errors import ConfigError
            raise ConfigError(f"unknown flag setting(s): {', '.join(sorted(unknown))}; known: {', '.join(sorted(known))}")
        values = {k: (tuple(v) if isinstance(v, list) else v) for k, v in data.items()}
        return cls(**values)


def symmetry_index(right: float, left: float) -> float:
    """SI = (R - L) / (0.5 (R + L)) x 100 (Robinson et al. 1987, from memory).

    Defined for positive quantities only (a ratio of negative strains, e.g. the short head shortening in late swing,
    means nothing); NaN otherwise.
    """
    if not (np.isfinite(right) and np.isfinite(left)) or right <= 0 or left <= 0:
        return float("nan")
    denom = 0.5 * (right + left)
    return float((right - left) / denom * 100.0)


def limb_symmetry_index(involved: float, uninvolved: float) -> float:
    """LSI = involved / uninvolved x 100 %; defined for positive quantities only (NaN otherwise)."""
    if not (np.isfinite(uninvolved) and np.isfinite(involved)) or uninvolved <= 0 or involved <= 0:
        return float("nan")
    return float(involved / uninvolved * 100.0)


def peak_in_window(values: np.ndarray, start: int, stop: int) -> tuple[float, int]:
    """Maximum of ``values[start:stop+1]`` and its index (NaN, -1 when the window holds no finite value)."""
    window = values[start:stop + 1]
    if window.size == 0 or not np.isfinite(window).any():
        return float("nan"), -1
    i = int(np.nanargmax(window))
    return float(window[i]), start + i


def window_peaks(values: np.ndarray, starts, stops) -> tuple[np.ndarray, np.ndarray]:
    """``peak_in_window`` for many windows ``[start, stop]`` (inclusive) at once, on every column of ``values``
    [F] or [F, C]: peaks [W] or [W, C] and their frame indices (NaN and -1 where a window holds no finite value)."""
    from .strides import window_frames

    x = np.asarray(values, dtype=float)
    flat = x.reshape(len(x), -1)
    starts = np.asarray(starts, dtype=int)
    frames, inside = window_frames(starts, np.asarray(stops, dtype=int) + 1, len(x))  # [W, L]
    width = frames.shape[1]
    windows = np.where(inside[:, :, None], flat[frames], np.nan)  # [W, L, C]
    ranked = np.where(np.isnan(windows), -np.inf, windows)  # as nanargmax: first maximum, NaN never wins
    first = np.argmax(ranked, axis=1) if width else np.zeros((len(starts), flat.shape[1]), dtype=int)
    empty = ~np.isfinite(windows).any(axis=1) if width else np.ones((len(starts), flat.shape[1]), dtype=bool)
    peak = np.take_along_axis(windows, first[:, None, :], axis=1)[:, 0, :] if width else np.full(empty.shape, np.nan)
    peak = np.where(empty, np.nan, peak)
    index = np.where(empty, -1, starts[:, None] + first)
    shape = (len(starts),) + x.shape[1:]
    return peak.reshape(shape), index.reshape(shape)


def _cv(sd: float, mean: float) -> float:
    return float(sd / abs(mean) * 100.0) if np.isfinite(mean) and mean != 0 and np.isfinite(sd) else float("nan")


_BAND_COLUMNS = ("peak_strain_p5_pct", "peak_strain_p95_pct", "peak_fibre_length_lopt_p5", "peak_fibre_length_lopt_p95",
                 "peak_force_n_p5", "peak_force_n_p95", "negative_work_j_p5", "negative_work_j_p95",
                 "late_swing_hip_extension_met_pct", "late_swing_knee_flexion_met_pct")


def _skipna_mean(values: np.ndarray) -> float:
    """``pd.Series(values).mean()`` by pandas' own steps (missing values set to 0 in the sum, not counted)."""
    missing = np.isnan(values)
    count = values.size - int(missing.sum())
    return float(np.where(missing, 0.0, values).sum() / count) if count else float("nan")


def _rows_by_muscle(rows: list[dict]) -> dict[tuple, dict[str, int]]:
    """Positions of summary rows by (athlete, session, muscle), then by side: the pairs of legs to compare."""
    out: dict[tuple, dict[str, int]] = {}
    for i, row in enumerate(rows):
        out.setdefault((row["athlete"], row["session"], row["muscle"]), {})[row["side"]] = i
    return out


def summarise(strides: pd.DataFrame, athletes: pd.DataFrame | None = None) -> pd.DataFrame:
    """One row per athlete/session/side/muscle: n, speed, mean/SD/CV of each metric, SI and LSI."""
    import pandas as pd

    keys = ["athlete", "session", "side", "muscle"]
    if strides.empty:
        return pd.DataFrame(columns=keys + ["n_strides", "speed_m_s"])
    # Columns as numpy arrays once, groups as row indices: the per-group arithmetic is numpy's (and pandas' skipna
    # mean's for the plain means) without building a DataFrame per group.
    columns = {name: strides[name].to_numpy(dtype=float) for name in
               (*SUMMARY_METRICS, "speed_m_s", "late_swing_moments_met_pct", *_BAND_COLUMNS) if name in strides}
    trial_of_row = strides["trial"].to_numpy()
    rows = []
    for key, index in sorted(strides.groupby(keys, sort=True).indices.items()):
        row = dict(zip(keys, key))
        row["n_strides"] = int(len(index))
        row["n_trials"] = int(pd.unique(trial_of_row[index]).size)
        row["speed_m_s"] = _skipna_mean(columns["speed_m_s"][index])
        for metric in SUMMARY_METRICS:
            vals = columns[metric][index] if metric in columns else np.array([np.nan])
            finite = vals[np.isfinite(vals)]
            mean = float(finite.mean()) if finite.size else float("nan")
            sd = float(finite.std(ddof=1)) if finite.size > 1 else float("nan")
            row[f"{metric}_mean"] = mean
            row[f"{metric}_sd"] = sd
            row[f"{metric}_cv_pct"] = _cv(sd, mean)
        for name in ("late_swing_moments_met_pct", *_BAND_COLUMNS):
            row[f"{name}_mean"] = _skipna_mean(columns[name][index]) if name in columns else float("nan")
        rows.append(row)
    summary = pd.DataFrame(rows)
    involved = {}
    if athletes is not None and not athletes.empty and "involved_side" in athletes:
        involved = {str(a): str(s).strip().lower() for a, s in zip(athletes["athlete"], athletes["involved_side"])}
    # SI and LSI per athlete/session/muscle, written to both sides' rows (values gathered first, columns set once)
    symmetry = {name: np.full(len(summary), np.nan) for name in SYMMETRY_METRICS}
    lsi_values = {name: np.full(len(summary), np.nan) for name in LSI_METRICS}
    for (athlete, _, _), sides in _rows_by_muscle(rows).items():
        if "left" not in sides or "right" not in sides:
            continue
        both = {side: rows[i] for side, i in sides.items()}
        at = [sides["right"], sides["left"]]
        for name, metric in SYMMETRY_METRICS.items():
            symmetry[name][at] = symmetry_index(both["right"][f"{metric}_mean"], both["left"][f"{metric}_mean"])
        involved_side = involved.get(str(athlete), "none")
        if involved_side in ("left", "right"):
            other = "left" if involved_side == "right" else "right"
            for name, metric in LSI_METRICS.items():
                lsi_values[name][at] = limb_symmetry_index(both[involved_side][f"{metric}_mean"],
                                                           both[other][f"{metric}_mean"])
    for name in SYMMETRY_METRICS:
        summary[f"{name}_symmetry_index_pct"] = symmetry[name]
    for name in LSI_METRICS:
        summary[f"{name}_lsi_pct"] = lsi_values[name]
    return summary.reset_index(drop=True)


def _real_difference(a: pd.Series, b: pd.Series, z: float) -> tuple[bool, float]:
    """Is mean(a) - mean(b) larger than z standard errors of stride-to-stride noise (Welch)? Returns (real, SE)."""
    sa, sb = a.get("sd", np.nan), b.get("sd", np.nan)
    na, nb = max(int(a.get("n", 1)), 1), max(int(b.get("n", 1)), 1)
    sa = 0.0 if not np.isfinite(sa) else sa
    sb = 0.0 if not np.isfinite(sb) else sb
    se = math.sqrt(sa * sa / na + sb * sb / nb)
    diff = abs(a["mean"] - b["mean"])
    return bool(diff > z * se), se


def _capacity_note(metric: str, right, left) -> str:
    """For work-based flags: say when the muscle model could not carry the hamstrings' share of the late-swing
    demand (hip extension and knee flexion) on at least 90 % of late-swing frames (pipeline's ``force_status``)."""
    if metric != "negative_work_j":
        return ""
    values = [v for v in (right.get("late_swing_moments_met_pct_mean", np.nan),
                          left.get("late_swing_moments_met_pct_mean", np.nan)) if np.isfinite(v)]
    if not values or np.mean(values) >= 90.0:
        return ""
    met = float(np.mean(values))
    return (f" Note: the modelled muscles could carry the late-swing hip-extension and knee-flexion demand in only "
            f"{met:.0f}% of late-swing frames, so forces there sit at the model's capacity and the work depends on the "
            "assumed strength; treat this work difference as indicative and look at the stretch results too.")


def compute_flags(summary: pd.DataFrame, athletes: pd.DataFrame | None, config: FlagConfig = FlagConfig()
                  ) -> pd.DataFrame:
    """Flags with value, threshold and a plain-language message (one row each)."""
    import pandas as pd

    rows: list[dict] = []
    if summary.empty:
        return pd.DataFrame(columns=FLAG_COLUMNS)
    involved = {}
    if athletes is not None and not athletes.empty and "involved_side" in athletes:
        involved = {str(a): str(s).strip().lower() for a, s in zip(athletes["athlete"], athletes["involved_side"])}

    def add(athlete, session, side, muscle, flag, value, threshold, message):
        rows.append(dict(athlete=athlete, session=session, side=side, muscle=muscle, flag=flag,
                         value=round(float(value), 3), threshold=round(float(threshold), 3), message=message))

    # few_strides: per side (reported once per athlete/session/side).
    for (athlete, session, side), group in summary.groupby(["athlete", "session", "side"], sort=True):
        n = int(group["n_strides"].min())
        if n < config.min_strides:
            add(athlete, session, side, "", "few_strides", n, config.min_strides,
                f"only {n} valid stride(s) on the {side} side (at least {config.min_strides} wanted): results for this "
                "side are weak; record more sprint trials or check the foot markers.")

    # speed_low: session speed against the athlete's best session.
    speeds = summary.groupby(["athlete", "session"], sort=True)["speed_m_s"].mean()
    for athlete, per_session in speeds.groupby(level=0, sort=True):
        best = per_session.max()
        for (_, session), speed in per_session.items():
            if np.isfinite(speed) and np.isfinite(best) and speed < config.speed_low_fraction * best:
                add(athlete, session, "", "", "speed_low", speed, config.speed_low_fraction * best,
                    f"running speed {speed:.1f} m/s is below {config.speed_low_fraction:.0%} of this athlete's best "
                    f"({best:.1f} m/s): hamstring stretch rises with speed, so comparisons with faster sessions are weak.")

    stretch = summary[summary["muscle"].isin(config.muscles)]
    records = stretch.to_dict("records")  # plain dicts: far cheaper to read than rows of a DataFrame
    for (athlete, session, muscle), sides in sorted(_rows_by_muscle(records).items()):
        by_side = {side: records[i] for side, i in sides.items()}
        if "left" not in by_side or "right" not in by_side:
            continue
        right, left = by_side["right"], by_side["left"]
        mname = MUSCLE_NAMES.get(muscle, muscle)
        for label, metric, what in (("peak stretch", "peak_strain_pct", "late-swing peak strain"),
                                    ("negative work", "negative_work_j", "lengthening (negative) work")):
            r = {"mean": right[f"{metric}_mean"], "sd": right[f"{metric}_sd"], "n": right["n_strides"]}
            l_ = {"mean": left[f"{metric}_mean"], "sd": left[f"{metric}_sd"], "n": left["n_strides"]}
            if not (np.isfinite(r["mean"]) and np.isfinite(l_["mean"])):
                continue
            si = symmetry_index(r["mean"], l_["mean"])
            _, se = _real_difference(r, l_, config.asymmetry_confidence_z)
            se_si = se / abs(0.5 * (r["mean"] + l_["mean"])) * 100.0 if np.isfinite(si) else float("nan")
            lower_bound = abs(si) - config.asymmetry_confidence_z * se_si
            if np.isfinite(si) and lower_bound > config.asymmetry_pct:
                lower = "right" if si < 0 else "left"
                add(athlete, session, lower, muscle, "side_asymmetry", si, config.asymmetry_pct,
                    f"{mname}: {what} differs between legs by {abs(si):.0f}% (symmetry index; right "
                    f"{r['mean']:.3g} vs left {l_['mean']:.3g}), lower on the {lower} side. Even allowing for "
                    f"stride-to-stride variation (one-sided 95% bound {lower_bound:.0f}%) it is beyond the "
                    f"{config.asymmetry_pct:.0f}% line." + _capacity_note(metric, right, left))
        side = involved.get(str(athlete), "none")
        if side in ("left", "right"):
            other = "left" if side == "right" else "right"
            inv = {"mean": by_side[side]["peak_strain_pct_mean"], "sd": by_side[side]["peak_strain_pct_sd"],
                   "n": by_side[side]["n_strides"]}
            uni = {"mean": by_side[other]["peak_strain_pct_mean"], "sd": by_side[other]["peak_strain_pct_sd"],
                   "n": by_side[other]["n_strides"]}
            lsi = limb_symmetry_index(inv["mean"], uni["mean"])
            real, _ = _real_difference(inv, uni, config.asymmetry_confidence_z)
            if np.isfinite(lsi) and lsi < config.guarding_lsi_pct and real:
                add(athlete, session, side, muscle, "involved_side_guarding", lsi, config.guarding_lsi_pct,
                    f"{mname}: the involved ({side}) side stretches to only {lsi:.0f}% of the other side in late swing "
                    f"(limb symmetry index; {config.guarding_lsi_pct:.0f}% is the usual return-to-run line). A "
                    "protective pattern is common while returning from a strain; review with the clinician.")

    # high_stretch: fixed limit, or above the squad distribution of athlete means (per muscle).
    per_athlete = stretch.groupby(["athlete", "session", "side", "muscle"], sort=True)["peak_fibre_length_lopt_mean"].mean()
    for muscle in config.muscles:
        if muscle not in per_athlete.index.get_level_values("muscle"):
            continue
        values = per_athlete.xs(muscle, level="muscle")
        if np.isfinite(config.high_stretch_limit_lopt):
            limit, how = config.high_stretch_limit_lopt, "the configured limit"
        else:
            athlete_means = values.groupby(level="athlete").mean()
            if athlete_means.notna().sum() < config.high_stretch_min_athletes:
                continue
            limit = float(athlete_means.mean() + config.high_stretch_squad_z * athlete_means.std(ddof=1))
            how = f"the squad mean + {config.high_stretch_squad_z:g} SD"
        for (athlete, session, side), value in values.items():
            if np.isfinite(value) and value > limit:
                add(athlete, session, side, muscle, "high_stretch", value, limit,
                    f"{MUSCLE_NAMES.get(muscle, muscle)}: late-swing peak fibre length reaches {value:.2f} of optimal "
                    f"length, above {how} ({limit:.2f}). Fibre length relative to optimal depends on the model's "
                    "assumed tendon slack length; compare within the athlete and squad rather than as an absolute.")
    flags = pd.DataFrame(rows, columns=FLAG_COLUMNS)
    return flags.sort_values(["athlete", "session", "flag", "side", "muscle"], kind="stable").reset_index(drop=True)
