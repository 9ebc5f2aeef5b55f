"""The run configuration: every key ``--config`` accepts, with its type, range, default and source.

One table (:data:`SETTINGS`) drives both the checks of a configuration file (:func:`load_config`: every key typed
and ranged, unknown keys and sections refused with "did you mean") and the listing ``hamstride config`` prints
(:func:`config_toml`). Defaults are read from the dataclasses that use them (``pipeline.AnalysisOptions``,
``metrics.FlagConfig``), so a changed default shows up here without editing this file.
"""
from __future__ import annotations

import math
import tomllib
from dataclasses import asdict, dataclass, fields
from pathlib import Path

from .errors import ConfigError
from .metrics import FlagConfig
from .pipeline import AnalysisOptions
from .squadinput import did_you_mean, read_input_text

__all__ = ["SECTIONS", "Setting", "COMMON", "SETTINGS", "settings_of", "jsonable", "RunConfig", "load_config",
           "config_toml"]

SECTIONS = ("analysis", "flags")


@dataclass(frozen=True)
class Setting:
    """One configuration key. ``kind``: number, integer, boolean, choice, range (a [low, high] pair of numbers)
    or list (a non-empty subset of ``choices``). ``low``/``high`` bound numbers (inclusive); ``words`` are strings
    accepted in place of a number and what they mean (e.g. "auto" -> None)."""

    section: str
    key: str
    kind: str
    note: str
    source: str
    low: float | None = None
    high: float | None = None
    unit: str = ""
    choices: tuple[str, ...] = ()
    words: tuple[tuple[str, object], ...] = ()

    def default(self):
        return getattr(AnalysisOptions() if self.section == "analysis" else FlagConfig(), self.key)

    def type_text(self) -> str:
        unit = f" ({self.unit})" if self.unit else ""
        extra = "".join(f' or "{w}"' for w, _ in self.words)
        if self.kind in ("number", "integer"):
            return f"{self.kind}{unit}{extra}"
        if self.kind == "range":
            return f"[low, high] numbers{unit}"
        if self.kind == "choice":
            return "one of " + ", ".join(f'"{c}"' for c in self.choices)
        if self.kind == "list":
            return "list of " + ", ".join(f'"{c}"' for c in self.choices)
        return self.kind

    def range_text(self) -> str:
        if self.low is None and self.high is None:
            return "-"
        return f"{self.low:g} to {self.high:g}"

    def check(self, value, where: str):
        """The value as the dataclass wants it, or ConfigError naming where, the value and what is expected."""
        expected = self._expected()

        def bad(extra: str = "") -> ConfigError:
            return ConfigError(f"{where} = {_show(value)}: expected {expected}{extra}", code="bad_config")

        if isinstance(value, float) and math.isnan(value) and any(w == "nan" for w, _ in self.words):
            return value  # TOML's own nan
        if isinstance(value, str):
            for word, meaning in self.words:
                if value.strip().lower() == word:
                    return meaning
        if self.kind in ("number", "integer"):
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                number = _parse_number(value)
                raise bad(" (write the number without quotes)" if number is not None else "")
            if self.kind == "integer" and not float(value).is_integer():
                raise bad()
            if math.isnan(float(value)) or not self.low <= value <= self.high:
                raise bad()
            return int(value) if self.kind == "integer" else float(value)
        if self.kind == "boolean":
            if not isinstance(value, bool):
                raise bad()
            return value
        if self.kind == "choice":
            if not isinstance(value, str) or value.strip().lower() not in self.choices:
                raise bad(did_you_mean(str(value), self.choices))
            return value.strip().lower()
        if self.kind == "range":
            if (not isinstance(value, list) or len(value) != 2
                    or any(isinstance(v, bool) or not isinstance(v, (int, float)) for v in value)
                    or not (self.low <= value[0] < value[1] <= self.high)):
                raise bad()
            return (float(value[0]), float(value[1]))
        if self.kind == "list":
            if not isinstance(value, list) or not value or any(v not in self.choices for v in value):
                raise bad()
            return tuple(value)
        raise AssertionError(self.kind)  # pragma: no cover - every kind is handled above

    def _expected(self) -> str:
        unit = f" {self.unit}" if self.unit else ""
        words = "".join(f', or "{w}"' for w, _ in self.words)
        if self.kind == "number":
            return f"a number{unit} from {self.low:g} to {self.high:g}{words}"
        if self.kind == "integer":
            return f"a whole number{unit} from {self.low:g} to {self.high:g}{words}"
        if self.kind == "boolean":
            return "true or false (without quotes)"
        if self.kind == "choice":
            return "one of " + ", ".join(f'"{c}"' for c in self.choices)
        if self.kind == "range":
            return f"[low, high] with {self.low:g} <= low < high <= {self.high:g}{unit}"
        return "a list of one or more of " + ", ".join(f'"{c}"' for c in self.choices)


def _parse_number(value) -> float | None:
    try:
        return float(value)
    except (TypeError, ValueError):
        return None


def _show(value) -> str:
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, bool):
        return "true" if value else "false"
    return str(value)


def _muscles() -> tuple[str, ...]:
    from .muscles import MUSCLES
    return tuple(MUSCLES)


def _hip_methods() -> tuple[str, ...]:
    from .segments import HIP_METHODS
    return tuple(HIP_METHODS)


COMMON = "common practice"
SETTINGS: tuple[Setting, ...] = (
    Setting("analysis", "cutoff_hz", "number", "low-pass cutoff for every marker; \"auto\" = chosen per trial by "
            "residual analysis", "Winter 2009, residual analysis (auto); a fixed value is " + COMMON,
            1, 100, "Hz", words=(("auto", None), ("residual", None))),
    Setting("analysis", "max_gap_frames", "integer", "longest marker gap filled by a cubic spline; longer gaps fail "
            "the trial", COMMON + " (about 10 frames)", 0, 100, "frames"),
    Setting("analysis", "hip_method", "choice", "hip joint centre regression from the pelvis landmarks",
            "Harrington et al. 2007 (harrington, harrington_pw); Bell et al. 1990 (bell)", choices=_hip_methods()),
    Setting("analysis", "stride_time_range_s", "range", "plausible stride time; other strides are rejected with a "
            "reason", COMMON, 0.1, 3.0, "s"),
    Setting("analysis", "contact_range_s", "range", "plausible foot contact time; other strides are rejected with a "
            "reason", COMMON, 0.02, 1.0, "s"),
    Setting("analysis", "monte_carlo_samples", "integer", "samples of model geometry and architecture for the "
            "uncertainty band (0 = no band)", "hamstride's model uncertainty (README, strides.csv _p5/_p95)",
            0, 5000),
    Setting("analysis", "force_band_samples", "integer", "samples of the force and negative-work band (each a "
            "full force-sharing solve; 0 = no band)", "hamstride's model uncertainty (README, strides.csv "
            "peak_force_n_p5/_p95, negative_work_j_p5/_p95)", 0, 1000),
    Setting("analysis", "scale_force_to_mass", "boolean", "no effect (kept so older configuration files load): "
            "muscle strength always scales with body mass x height", "Handsfield et al. 2014 (muscles.max_isometric_force)"),
    Setting("analysis", "min_strides", "integer", "a trial needs at least this many complete strides per leg",
            COMMON, 1, 50),
    Setting("analysis", "min_speed_m_s", "number", "slower trials are refused as not running fast enough",
            COMMON, 0.0, 15.0, "m/s"),
    Setting("analysis", "strict", "boolean", "warnings (gaps, rejected strides, event disagreements) fail the "
            "trial, as --strict does", "hamstride (--strict)"),
    Setting("flags", "asymmetry_pct", "number", "side_asymmetry when |symmetry index| of peak strain or negative "
            "work exceeds this", "<10 % side difference for return to sport (MSSE 2019;51:1091); imbalance >=15 % "
            "raised strain risk 2.4x (Bourne et al. 2015)", 0, 100, "%"),
    Setting("flags", "asymmetry_confidence_z", "number", "...and still exceeds it after subtracting this many "
            "standard errors of the stride-to-stride variation (1.645 = one-sided 95 %)",
            "normal distribution, one-sided 95 %", 0, 5),
    Setting("flags", "guarding_lsi_pct", "number", "involved_side_guarding when the involved side's peak strain is "
            "below this % of the other side (limb symmetry index)", "LSI >= 90 % for return to sport "
            "(MSSE 2019;51:1091)", 0, 100, "%"),
    Setting("flags", "high_stretch_limit_lopt", "number", "high_stretch above this peak fibre length / optimal "
            "length; \"nan\" = use the squad distribution instead", "hamstride (no published limit)", 0.5, 3.0,
            "l/l_opt", words=(("nan", float("nan")), ("squad", float("nan")))),
    Setting("flags", "high_stretch_squad_z", "number", "high_stretch above the squad mean + this many SD "
            "(per muscle)", COMMON + " (about 2 SD)", 0, 5),
    Setting("flags", "high_stretch_min_athletes", "integer", "the squad distribution needs at least this many "
            "athletes", COMMON, 2, 1000),
    Setting("flags", "min_strides", "integer", "few_strides below this many valid strides on a side", COMMON, 1, 100),
    Setting("flags", "speed_low_fraction", "number", "speed_low when the session speed is below this fraction of "
            "the athlete's best", COMMON, 0.0, 1.0),
    Setting("flags", "muscles", "list", "muscles the stretch flags look at", "hamstride (the biarticular hamstrings)",
            choices=_muscles()),
)


def settings_of(section: str) -> dict[str, Setting]:
    """Every key of one section: the documented ones, plus any dataclass field without an entry here (typed from
    its default, so a new option works before it is documented)."""
    documented = {s.key: s for s in SETTINGS if s.section == section}
    target = AnalysisOptions if section == "analysis" else FlagConfig
    out = {}
    for f in fields(target):
        out[f.name] = documented.get(f.name) or _inferred(section, f.name, getattr(target(), f.name))
    return out


def _inferred(section: str, key: str, default) -> Setting:
    if isinstance(default, bool):
        return Setting(section, key, "boolean", "(not documented yet)", "-")
    if isinstance(default, int):
        return Setting(section, key, "integer", "(not documented yet)", "-", 0, 1e9)
    if isinstance(default, float):
        return Setting(section, key, "number", "(not documented yet)", "-", -1e9, 1e9,
                       words=(("nan", float("nan")),))
    if isinstance(default, tuple) and len(default) == 2 and all(isinstance(v, (int, float)) for v in default):
        return Setting(section, key, "range", "(not documented yet)", "-", -1e9, 1e9)
    return Setting(section, key, "choice", "(not documented yet)", "-", choices=(str(default),))


def jsonable(value):
    """A value with NaN as None and tuples as lists (for JSON)."""
    if isinstance(value, float) and math.isnan(value):
        return None
    if isinstance(value, dict):
        return {k: jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    return value


@dataclass(frozen=True)
class RunConfig:
    analysis: AnalysisOptions = AnalysisOptions()
    flags: FlagConfig = FlagConfig()

    def as_dict(self) -> dict:
        return {"analysis": jsonable(asdict(self.analysis)), "flags": jsonable(asdict(self.flags))}


def load_config(path: str | Path | None, **overrides) -> RunConfig:
    """Read and check a TOML configuration ([analysis] and [flags]); ``overrides`` (not None) replace analysis keys.

    Raises ConfigError (one line naming the file, key, value and what is expected) for a missing or unreadable
    file, invalid TOML, unknown sections or keys (with "did you mean") and values of the wrong type or range.
    """
    data: dict = {}
    if path is not None:
        text = read_input_text(path, "config file")
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"config file {path} is not valid TOML: {exc}", code="bad_config") from None
    name = Path(path).name if path is not None else "config"
    every = {s: settings_of(s) for s in SECTIONS}
    for key, value in data.items():
        if key in SECTIONS and isinstance(value, dict):
            continue
        home = next((s for s in SECTIONS if key in every[s]), None)
        if home is not None:
            raise ConfigError(f"{name}: '{key}' must be under a section: put it below the line [{home}]",
                              code="bad_config")
        raise ConfigError(f"{name}: unknown section [{key}]{did_you_mean(key, SECTIONS)}; the sections are "
                          "[analysis] and [flags] (see `hamstride config`)", code="bad_config")
    values: dict[str, dict] = {}
    for section in SECTIONS:
        values[section] = {}
        for key, value in (data.get(section) or {}).items():
            setting = every[section].get(key)
            if setting is None:
                other = next((s for s in SECTIONS if s != section and key in every[s]), None)
                if other is not None:
                    raise ConfigError(f"{name}: '{key}' belongs in [{other}], not [{section}]", code="bad_config")
                raise ConfigError(f"{name}: unknown key '{key}' in [{section}]{did_you_mean(key, every[section])}; "
                                  "`hamstride config` lists every key", code="bad_config")
            values[section][key] = setting.check(value, f"{name} [{section}] {key}")
    values["analysis"].update({k: v for k, v in overrides.items() if v is not None})
    return RunConfig(AnalysisOptions(**values["analysis"]), FlagConfig(**values["flags"]))


def _toml_value(value) -> str:
    if value is None:
        return '"auto"'
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float) and math.isnan(value):
        return "nan"
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, (tuple, list)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    return repr(value)


def config_toml() -> str:
    """Every key ``--config`` accepts, as a commented TOML file of the defaults (``hamstride config``)."""
    lines = ["# hamstride configuration: use with --config FILE (squad, timeline, analyze).",
             "# Every key is optional; the values below are the defaults. Each key's comment gives",
             "# what it does, then type | range | default | source.", ""]
    for section in SECTIONS:
        lines.append(f"[{section}]")
        for key, setting in settings_of(section).items():
            default = _toml_value(setting.default())
            lines.append(f"# {setting.note}")
            lines.append(f"#   type: {setting.type_text()} | range: {setting.range_text()} | default: {default} "
                         f"| source: {setting.source}")
            lines.append(f"{key} = {default}")
        lines.append("")
    return "\n".join(lines)
