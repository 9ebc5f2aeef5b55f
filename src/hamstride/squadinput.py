"""Squad inputs, checked before any analysis: athletes.csv, the folder layout and the marker map.

Every problem is one :class:`~hamstride.errors.ConfigError` whose message names the file, the row or key, the value
found and what is expected, so a physiotherapist can fix it without help; the command line turns it into exit
code 2 before any trial is analysed or any output file is written. Problems that do not stop the run (athlete
folders missing from athletes.csv, C3D files outside a session folder) are returned as warnings and the files are
listed as skipped.
"""
from __future__ import annotations

import contextlib
import csv
import datetime as dt
import difflib
import math
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Iterable, Mapping

from .errors import ConfigError

__all__ = ["ATHLETE_COLUMNS", "REQUIRED_ATHLETE_COLUMNS", "OPTIONAL_ATHLETE_COLUMNS", "BODY_MASS_RANGE_KG",
           "HEIGHT_RANGE_M", "STRENGTH_FACTOR_RANGE", "INVOLVED_SIDES", "SEXES", "DATE_PREFIX", "MARKER_MAP_SECTIONS",
           "MARKER_MAP_KEYS", "read_input_bytes", "read_input_text", "require_file", "did_you_mean",
           "read_athletes", "session_date", "SessionTrials", "SquadLayout", "scan_squad", "match_athlete",
           "check_marker_map"]

if TYPE_CHECKING:  # pandas loads only when a table is read: `hamstride --help` stays fast
    import pandas as pd

ATHLETE_COLUMNS = ["athlete", "body_mass_kg", "height_m", "sex", "involved_side", "injury_date"]
REQUIRED_ATHLETE_COLUMNS = ("athlete", "body_mass_kg", "height_m", "sex", "involved_side")
OPTIONAL_ATHLETE_COLUMNS = ("injury_date", "strength_factor")
# Plausible adult and adolescent athletes (common practice; wide on purpose: they catch typos and unit slips,
# e.g. a height in centimetres or a mass in pounds, not unusual bodies).
BODY_MASS_RANGE_KG = (30.0, 200.0)
HEIGHT_RANGE_M = (1.20, 2.30)
STRENGTH_FACTOR_RANGE = (0.3, 3.0)  # multiplies the model's muscle strength; 1 = the model's own estimate (assumption: beyond 0.3-3 a value is more likely a typo than an athlete)
INVOLVED_SIDES = ("left", "right", "none")  # the involved_side column
SEXES = {"male": "male", "m": "male", "female": "female", "f": "female"}
DATE_PREFIX = re.compile(r"^(\d{4}-\d{2}-\d{2})")
MARKER_MAP_SECTIONS = ("landmarks", "clusters")
MARKER_MAP_KEYS = ("prefix",)  # top-level keys (landmarks.load_marker_map: whose markers a two-subject file uses)


# --------------------------------------------------------------------------------------------- input files

@contextlib.contextmanager
def _opening(path: Path, what: str):
    """Turn the errors of opening an input file into one ConfigError naming ``what`` it is (exit code 2)."""
    try:
        yield
    except FileNotFoundError:
        raise ConfigError(f"{what} {path} not found", code="not_found") from None
    except IsADirectoryError:
        raise ConfigError(f"{what} {path} is a folder; give the path of the file itself", code="not_a_file") from None
    except PermissionError:
        raise ConfigError(f"{what} {path} cannot be read (permission denied); check the file's permissions",
                          code="unreadable") from None
    except OSError as exc:
        raise ConfigError(f"{what} {path} cannot be read ({exc.strerror or exc})", code="unreadable") from None


def read_input_bytes(path: str | Path, what: str) -> bytes:
    """The bytes of an input file, or a ConfigError naming ``what`` it is (missing, a folder, unreadable)."""
    path = Path(path)
    with _opening(path, what):
        return path.read_bytes()


def read_input_text(path: str | Path, what: str) -> str:
    """An input text file (UTF-8, a byte-order mark allowed), refused with one line when empty or binary."""
    raw = read_input_bytes(path, what)
    if not raw.strip():
        raise ConfigError(f"{what} {path} is empty", code="empty_file")
    if raw[:2] in (b"\xff\xfe", b"\xfe\xff"):
        raise ConfigError(f"{what} {path} is UTF-16 text; save it as UTF-8 (e.g. 'CSV UTF-8')", code="not_text")
    if b"\x00" in raw:
        raise ConfigError(f"{what} {path} is not a text file (it holds binary data); give the text file itself",
                          code="not_text")
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{what} {path} is not UTF-8 text (byte {exc.start}); save it as UTF-8 (e.g. 'CSV UTF-8')",
                          code="not_text") from None


def require_file(path: str | Path, what: str) -> Path:
    """``path`` if it names a readable file (checked by opening it), else a ConfigError (exit code 2)."""
    path = Path(path)
    if path.is_dir():
        raise ConfigError(f"{what} {path} is a folder; give the path of the file itself", code="not_a_file")
    with _opening(path, what), path.open("rb"):
        pass
    return path


def did_you_mean(word: str, known: Iterable[str]) -> str:
    """' (did you mean 'x'?)' for the closest known word, or ''."""
    close = difflib.get_close_matches(word, list(known), n=1, cutoff=0.6)
    if not close:
        lowered = {k.lower(): k for k in known}
        close = [lowered[c] for c in difflib.get_close_matches(word.lower(), list(lowered), n=1, cutoff=0.6)]
    return f" (did you mean '{close[0]}'?)" if close else ""


# --------------------------------------------------------------------------------------------- athletes.csv

def _athletes_error(path: Path, line: int | None, message: str) -> ConfigError:
    where = f"{path.name} line {line}" if line is not None else path.name
    return ConfigError(f"{where}: {message}", code="bad_athletes")


def _number(text: str, path: Path, line: int, column: str, low: float, high: float, unit: str,
            hint: str = "") -> float:
    try:
        value = float(text)
    except ValueError:
        raise _athletes_error(path, line, f"{column} = '{text}': expected a number in {unit} "
                                          f"(digits, e.g. {low + (high - low) / 4:g})") from None
    if not math.isfinite(value) or not low <= value <= high:
        raise _athletes_error(path, line, f"{column} = '{text}': expected {unit} between {low:g} and {high:g}{hint}")
    return value


def _iso_date(text: str, path: Path, line: int, column: str) -> str:
    if re.fullmatch(r"\d{4}-\d{2}-\d{2}", text):
        try:
            return dt.date.fromisoformat(text).isoformat()
        except ValueError:
            pass
    suggestion = ""
    match = re.fullmatch(r"(\d{1,2})[./-](\d{1,2})[./-](\d{4})", text)
    if match:  # day first, as most of the world writes it; only suggested, never assumed
        day, month, year = (int(g) for g in match.groups())
        try:
            suggestion = f" (for {day} {dt.date(year, month, 1):%B} {year} write {dt.date(year, month, day).isoformat()})"
        except ValueError:
            suggestion = ""
    raise _athletes_error(path, line, f"{column} = '{text}': expected a date written YYYY-MM-DD{suggestion}")


def read_athletes(path: str | Path) -> pd.DataFrame:
    """Read and check athletes.csv; one row per athlete with the columns of ``ATHLETE_COLUMNS`` (+ extras).

    Rules (README "athletes.csv"): comma-separated UTF-8 text with a header row; the columns ``athlete,
    body_mass_kg, height_m, sex, involved_side`` are required, ``injury_date`` and ``strength_factor`` optional,
    other columns are kept (a name close to a known one is refused as a likely typo); athlete codes are unique
    (letter case ignored); ``body_mass_kg`` (30-200) and ``height_m`` (1.20-2.30) are numbers or empty (unknown:
    the mass then comes from the C3D file); ``sex`` is male or female (m/f); ``involved_side`` is left, right or
    none (empty = none); ``injury_date`` is YYYY-MM-DD or empty; ``strength_factor`` is a positive number
    (0.1-10; empty or no column = 1; always in the table returned). Blank lines are ignored. Raises ConfigError
    naming the line, column, value and rule.
    """
    path = Path(path)
    text = read_input_text(path, "athletes table")
    lines = text.splitlines()
    header_line = next((i for i, line in enumerate(lines) if line.strip()), 0)
    header = lines[header_line]
    if "," not in header:
        for sep, name in ((";", "semicolons"), ("\t", "tabs"), ("|", "'|' characters")):
            if sep in header:
                raise _athletes_error(path, header_line + 1, f"the columns are separated by {name}; hamstride "
                                      "reads comma-separated files: save it as 'CSV (comma delimited)'")
    rows = list(csv.reader(lines))
    columns = [c.strip() for c in rows[header_line]]
    missing = [c for c in REQUIRED_ATHLETE_COLUMNS if c not in columns]
    known = ATHLETE_COLUMNS + list(OPTIONAL_ATHLETE_COLUMNS)
    for column in columns:
        if column not in known:
            hint = did_you_mean(column, known)
            if hint:
                raise _athletes_error(path, header_line + 1, f"unknown column '{column}'{hint}")
    if missing:
        raise _athletes_error(path, header_line + 1, f"missing column(s) {', '.join(missing)}; the header must "
                              f"name {', '.join(REQUIRED_ATHLETE_COLUMNS)} (optional: "
                              f"{', '.join(OPTIONAL_ATHLETE_COLUMNS)})")
    duplicates = sorted({c for c in columns if columns.count(c) > 1 and c})
    if duplicates:
        raise _athletes_error(path, header_line + 1, f"column {duplicates[0]} appears twice in the header")
    records: list[dict] = []
    seen: dict[str, int] = {}
    for i, row in enumerate(rows[header_line + 1:], start=header_line + 2):
        if not any(cell.strip() for cell in row):
            continue
        if len(row) > len(columns) and any(cell.strip() for cell in row[len(columns):]):
            raise _athletes_error(path, i, f"{len(row)} values but the header names {len(columns)} columns "
                                  "(a comma inside a value? put that value in double quotes)")
        cells = {c: (row[k].strip() if k < len(row) else "") for k, c in enumerate(columns)}
        records.append(_athlete_record(cells, path, i, seen))
    if not records:
        raise _athletes_error(path, None, "no athlete rows under the header")
    import pandas as pd

    df = pd.DataFrame.from_records(records)
    extras = [c for c in df.columns if c not in ATHLETE_COLUMNS]
    return df[ATHLETE_COLUMNS + extras]


def _athlete_record(cells: Mapping[str, str], path: Path, line: int, seen: dict[str, int]) -> dict:
    code = cells["athlete"]
    if not code:
        raise _athletes_error(path, line, "athlete is empty: every row needs the athlete's code")
    if code.lower() in seen:
        raise _athletes_error(path, line, f"athlete {code} is listed twice (also on line {seen[code.lower()]}; "
                              "codes are compared without letter case)")
    seen[code.lower()] = line
    record: dict[str, object] = dict(cells)
    record["athlete"] = code
    mass, height = cells["body_mass_kg"], cells["height_m"]
    record["body_mass_kg"] = _number(mass, path, line, "body_mass_kg", *BODY_MASS_RANGE_KG, "kg") if mass else math.nan
    record["height_m"] = (_number(height, path, line, "height_m", *HEIGHT_RANGE_M, "metres",
                                  _unit_hint(height)) if height else math.nan)
    sex = cells["sex"].lower()
    if sex not in SEXES:
        raise _athletes_error(path, line, f"sex = '{cells['sex']}': expected male or female (it chooses the "
                              "segment inertia tables, de Leva 1996)")
    record["sex"] = SEXES[sex]
    side = cells["involved_side"].lower() or "none"
    if side not in INVOLVED_SIDES:
        raise _athletes_error(path, line, f"involved_side = '{cells['involved_side']}': expected left, right or none"
                              + did_you_mean(side, INVOLVED_SIDES))
    record["involved_side"] = side
    injury = cells.get("injury_date", "")
    record["injury_date"] = _iso_date(injury, path, line, "injury_date") if injury else math.nan
    factor = cells.get("strength_factor", "")  # always in the table: 1 when the column or the cell is empty
    record["strength_factor"] = (_number(factor, path, line, "strength_factor", *STRENGTH_FACTOR_RANGE,
                                         "a positive factor") if factor else 1.0)
    return record


def _unit_hint(text: str) -> str:
    try:
        value = float(text)
    except ValueError:
        return ""
    return f" ({text} looks like centimetres: write {value / 100:.2f})" if 120 <= value <= 230 else ""


# --------------------------------------------------------------------------------------------- folder layout

def session_date(session: str) -> dt.date | None:
    """The date a session folder's name starts with (YYYY-MM-DD), or None."""
    match = DATE_PREFIX.match(session)
    if not match:
        return None
    try:
        return dt.date.fromisoformat(match.group(1))
    except ValueError:
        return None


@dataclass(frozen=True)
class SessionTrials:
    """The C3D files of one session folder: sprint trials and static calibration trials (``static*.c3d``)."""

    athlete: str  # the code as written in athletes.csv (the folder name when unlisted)
    folder: Path
    trials: tuple[Path, ...]
    statics: tuple[Path, ...]

    @property
    def session(self) -> str:
        return self.folder.name


@dataclass(frozen=True)
class SquadLayout:
    """What a squad folder holds, checked: athletes.csv, the sessions to analyse, skipped files and warnings."""

    root: Path
    athletes: pd.DataFrame
    sessions: tuple[SessionTrials, ...]
    skipped: tuple[tuple[Path, str], ...] = ()  # (file, reason) of C3D files not analysed
    warnings: tuple[str, ...] = ()
    athletes_csv: Path | None = None

    @property
    def n_trials(self) -> int:
        return sum(len(s.trials) for s in self.sessions)

    def athlete_codes(self) -> list[str]:
        """Codes of the athletes that have trials to analyse, in folder order."""
        return list(dict.fromkeys(s.athlete for s in self.sessions))


def _visible_dirs(folder: Path) -> list[Path]:
    return sorted(p for p in folder.iterdir() if p.is_dir() and not p.name.startswith("."))


def _c3d_files(folder: Path) -> list[Path]:
    return sorted(p for p in folder.iterdir() if p.is_file() and p.suffix.lower() == ".c3d")


def scan_squad(root: str | Path, *, allow_unlisted: bool = False, exclude: Iterable[str | Path] = ()) -> SquadLayout:
    """Check a squad folder's layout and list its sessions (ROOT/athletes.csv, ROOT/ATHLETE/YYYY-MM-DD_name/*.c3d).

    Refused (ConfigError, exit code 2): a missing root; a session folder holding C3D files whose name does not
    start with a valid date; no trial to analyse. Skipped with a warning: athlete folders not listed in
    athletes.csv (analysed, without body data, when ``allow_unlisted``) and C3D files outside a session folder.
    ``exclude`` names folders to ignore (e.g. an output folder inside ROOT).
    """
    root = Path(root)
    if not root.exists():
        raise ConfigError(f"squad folder {root} not found", code="not_found")
    if not root.is_dir():
        raise ConfigError(f"squad folder {root} is a file; give the folder that holds athletes.csv and the athlete "
                          "folders", code="not_a_folder")
    excluded = {Path(p).resolve() for p in exclude}
    csv_path = root / "athletes.csv"
    if csv_path.exists() or csv_path.is_symlink():
        athletes = read_athletes(csv_path)
        listed_csv: Path | None = csv_path
    else:
        import pandas as pd

        athletes = pd.DataFrame(columns=ATHLETE_COLUMNS)
        listed_csv = None
    codes = {str(code).lower(): str(code) for code in athletes["athlete"]}
    warnings: list[str] = []
    skipped: list[tuple[Path, str]] = []
    sessions: list[SessionTrials] = []
    unlisted: list[str] = []
    for stray in _c3d_files(root):
        skipped.append((stray, "not inside an ATHLETE/SESSION folder"))
    for athlete_dir in _visible_dirs(root):
        if athlete_dir.resolve() in excluded:
            continue
        code = codes.get(athlete_dir.name.lower())
        athlete_sessions = []
        for stray in _c3d_files(athlete_dir):
            skipped.append((stray, "not inside a session folder (ATHLETE/YYYY-MM-DD_name/)"))
        for session_dir in _visible_dirs(athlete_dir):
            files = _c3d_files(session_dir)
            if not files:
                continue
            if session_date(session_dir.name) is None:
                raise ConfigError(f"session folder {session_dir}: the name must start with the session date "
                                  f"YYYY-MM-DD (e.g. 2026-03-02_{session_dir.name}); rename it", code="bad_layout")
            statics = tuple(p for p in files if p.name.lower().startswith("static"))
            trials = tuple(p for p in files if p not in statics)
            athlete_sessions.append(SessionTrials(code or athlete_dir.name, session_dir, trials, statics))
        athlete_sessions.sort(key=lambda s: (session_date(s.session), s.session))
        if code is None and athlete_sessions:
            if not allow_unlisted:
                unlisted.append(athlete_dir.name)
                skipped.extend((t, "athlete not in athletes.csv") for s in athlete_sessions for t in s.trials)
                continue
            unlisted.append(athlete_dir.name)
        sessions.extend(athlete_sessions)
    where = "athletes.csv" if listed_csv is not None else f"athletes.csv (there is none in {root})"
    if unlisted:
        action = ("analysed without body data (--allow-unlisted)" if allow_unlisted
                  else "skipped; add them to athletes.csv or pass --allow-unlisted")
        warnings.append(f"athlete folder(s) not in {where}: {', '.join(unlisted)}; {action}")
    strays = [p for p, reason in skipped if reason.startswith("not inside")]
    if strays:
        warnings.append(f"{len(strays)} C3D file(s) outside a session folder skipped: "
                        + ", ".join(str(p.relative_to(root)) for p in strays[:5]) + (" ..." if len(strays) > 5 else ""))
    layout = SquadLayout(root, athletes, tuple(sessions), tuple(skipped), tuple(warnings), listed_csv)
    if layout.n_trials == 0:
        hint = ("; " + "; ".join(warnings)) if warnings else ""
        raise ConfigError(f"no trials to analyse in squad folder {root}: expected "
                          f"{root}/ATHLETE/YYYY-MM-DD_session/*.c3d with each ATHLETE listed in athletes.csv{hint}",
                          code="no_trials")
    return layout


def match_athlete(requested: str, codes: Iterable[str], root: str | Path, listed: Iterable[str] = ()) -> str:
    """The athlete code (of those with trials) matching ``requested`` without regard to letter case, or a
    ConfigError listing the codes; ``listed`` (athletes.csv's codes) tells a listed athlete without trials apart."""
    codes = list(codes)
    by_case = {c.lower(): c for c in codes}
    found = by_case.get(requested.strip().lower())
    if found is None:
        known = ", ".join(codes) if codes else "none"
        listed_code = {str(c).lower(): str(c) for c in listed}.get(requested.strip().lower())
        what = (f"athlete {listed_code} is in athletes.csv but has no trials in {root}" if listed_code
                else f"no athlete '{requested}' with trials in {root}{did_you_mean(requested, codes)}")
        raise ConfigError(f"{what}; athletes with trials: {known}", code="unknown_athlete")
    return found


# --------------------------------------------------------------------------------------------- marker map

def check_marker_map(path: str | Path | None):
    """Load a marker map after checking the file (exists, readable, text, valid TOML, known sections).

    Landmark and cluster names are checked by :func:`landmarks.load_marker_map` (unknown names with "did you
    mean"). Returns the MarkerMap.
    """
    from .landmarks import load_marker_map

    if path is None:
        return load_marker_map(None)
    text = read_input_text(path, "marker map")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"marker map {path} is not valid TOML: {exc}", code="bad_marker_map") from None
    for key, value in data.items():
        if key in MARKER_MAP_KEYS:
            continue  # checked by load_marker_map
        if key not in MARKER_MAP_SECTIONS:
            what = f"section [{key}]" if isinstance(value, dict) else f"key '{key}'"
            raise ConfigError(f"marker map {path}: unknown {what}{did_you_mean(key, MARKER_MAP_SECTIONS + MARKER_MAP_KEYS)}; "
                              "a marker map has a [landmarks] section (landmark = \"label\"), optionally [clusters] "
                              "and a first line prefix = \"SUBJECT\"", code="bad_marker_map")
        if not isinstance(value, dict):
            raise ConfigError(f"marker map {path}: '{key}' must be a section, written [{key}] on its own line",
                              code="bad_marker_map")
    try:
        return load_marker_map(path)
    except ConfigError as exc:
        raise ConfigError(exc.message, code="bad_marker_map") from None
