"""The command-line contract on careless input (issue 15): every case gives its documented exit code, one line
naming the problem, no traceback, and (for usage errors) no output file.

Exit codes (README): 0 success, 1 some trials failed (each listed once), 2 usage error, 3 internal error.
The commands run in this process through ``cli.main`` (what the ``hamstride`` entry point calls); one test runs the
real entry point in a subprocess.
"""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from hamstride import cli
from hamstride.errors import ConfigError
from hamstride.squadinput import match_athlete, read_athletes

HEADER = "athlete,body_mass_kg,height_m,sex,involved_side,injury_date\n"
GOOD_ROWS = "QX01,74.0,1.80,male,right,2026-01-19\nQX02,61.5,1.69,female,none,\n"
FAST_CONFIG = "[analysis]\nmonte_carlo_samples = 0\n"


def _files(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _squad(base: Path, athletes_csv: str | bytes | None = HEADER + GOOD_ROWS,
           sessions=(("QX01", "2026-02-02_return1"), ("QX02", "2026-02-02_testing"))) -> Path:
    """A squad folder whose C3D files are placeholders: a usage error must stop the run before any is read (a
    trial that were read would fail as 'not a C3D' and give exit code 1, not 2)."""
    root = base / "squad"
    root.mkdir()
    if isinstance(athletes_csv, str):
        (root / "athletes.csv").write_text(athletes_csv, encoding="utf-8")
    elif isinstance(athletes_csv, bytes):
        (root / "athletes.csv").write_bytes(athletes_csv)
    for athlete, session in sessions:
        folder = root / athlete / session
        folder.mkdir(parents=True)
        (folder / "sprint_01.c3d").write_bytes(b"placeholder, never read on a usage error" * 20)
    return root


def run(argv: list[str], capsys) -> tuple[int, list[str], str]:
    """Exit code, the non-empty stderr lines, and everything printed."""
    code = cli.main([str(a) for a in argv])
    captured = capsys.readouterr()
    lines = [line for line in captured.err.splitlines() if line.strip()]
    return code, lines, captured.out + captured.err


def assert_usage_error(code: int, lines: list[str], text: str, *words: str) -> None:
    assert code == 2, text
    assert "Traceback" not in text
    assert len(lines) == 1, lines
    assert lines[0].startswith("error ["), lines[0]
    for word in words:
        assert word in lines[0], (word, lines[0])


# ------------------------------------------------------------------------------------------ athletes.csv

ATHLETES_CASES = {
    # name: (athletes.csv text, words the one line must hold)
    "side_misspelt": (HEADER + "QX01,74.0,1.80,male,rigth,2026-01-19\nQX02,61.5,1.69,female,none,\n",
                      ["athletes.csv line 2", "involved_side", "rigth", "left, right or none"]),
    "date_day_first": (HEADER + "QX01,74.0,1.80,male,right,19/01/2026\nQX02,61.5,1.69,female,none,\n",
                       ["line 2", "injury_date", "19/01/2026", "YYYY-MM-DD", "2026-01-19"]),
    "mass_negative": (HEADER + "QX01,-78,1.80,male,right,\nQX02,61.5,1.69,female,none,\n",
                      ["line 2", "body_mass_kg", "-78", "between 30 and 200"]),
    "mass_in_words": (HEADER + "QX01,74.0,1.80,male,right,\nQX02,seventy-eight,1.69,female,none,\n",
                      ["line 3", "body_mass_kg", "seventy-eight", "number"]),
    "mass_column_missing": ("athlete,height_m,sex,involved_side,injury_date\nQX01,1.80,male,right,\n",
                            ["missing column(s) body_mass_kg"]),
    "semicolons": (HEADER.replace(",", ";") + GOOD_ROWS.replace(",", ";"), ["semicolons", "comma"]),
    "tabs": (HEADER.replace(",", "\t") + GOOD_ROWS.replace(",", "\t"), ["tabs"]),
    "height_in_cm": (HEADER + "QX01,74.0,180,male,right,\n", ["height_m", "180", "centimetres", "1.80"]),
    "duplicate_athlete": (HEADER + GOOD_ROWS + "qx01,70,1.75,male,none,\n", ["line 4", "qx01", "listed twice"]),
    "sex_unknown": (HEADER + "QX01,74.0,1.80,x,right,\n", ["sex", "'x'", "male or female"]),
    "empty_code": (HEADER + ",74.0,1.80,male,right,\n", ["line 2", "athlete is empty"]),
    "column_typo": (HEADER.replace("injury_date", "injury_dat") + GOOD_ROWS, ["injury_dat", "injury_date"]),
    "strength_factor_negative": (HEADER.strip() + ",strength_factor\nQX01,74.0,1.80,male,right,,-1\n",
                                 ["strength_factor", "-1"]),
    "header_only": (HEADER, ["no athlete rows"]),
    "empty_file": ("", ["athletes table", "is empty"]),
    "blank_lines_only": ("\n\n  \n", ["is empty"]),
    "binary_file": (b"PK\x03\x04\x14\x00\x06\x00" + bytes(range(256)) * 4, ["not a text file"]),
    "utf16": ((HEADER + GOOD_ROWS).encode("utf-16"), ["UTF-16", "UTF-8"]),
    "not_utf8": (HEADER.encode() + "QX01,74.0,1.80,male,right,\n".encode() + "QX\xe902,61,1.7,female,none,\n"
                 .encode("latin-1"), ["not UTF-8"]),
}


@pytest.mark.parametrize("case", sorted(ATHLETES_CASES))
def test_bad_athletes_csv_is_one_line_and_exit_2_before_any_analysis(case, tmp_path, capsys):
    text, words = ATHLETES_CASES[case]
    root = _squad(tmp_path, text)
    before = _files(tmp_path)
    code, lines, out = run(["squad", root, "--out", tmp_path / "out"], capsys)
    assert_usage_error(code, lines, out, *words)
    assert _files(tmp_path) == before and not (tmp_path / "out").exists()


def test_athletes_csv_that_is_a_folder(tmp_path, capsys):
    root = _squad(tmp_path, None)
    (root / "athletes.csv").mkdir()
    code, lines, out = run(["squad", root, "--out", tmp_path / "out"], capsys)
    assert_usage_error(code, lines, out, "athletes.csv", "is a folder")
    assert not (tmp_path / "out").exists()


def test_unreadable_athletes_csv_simulated(tmp_path, capsys, monkeypatch):
    """Permission denied, simulated: the tests may run as root, who can read any file."""
    root = _squad(tmp_path)
    target = (root / "athletes.csv").resolve()
    real = Path.read_bytes

    def denied(self):
        if self.resolve() == target:
            raise PermissionError(13, "Permission denied", str(self))
        return real(self)

    monkeypatch.setattr(Path, "read_bytes", denied)
    code, lines, out = run(["squad", root, "--out", tmp_path / "out"], capsys)
    assert_usage_error(code, lines, out, "athletes.csv", "permission denied")
    assert not (tmp_path / "out").exists()


def test_unreadable_athletes_csv_by_permissions(tmp_path, capsys):
    root = _squad(tmp_path)
    path = root / "athletes.csv"
    path.chmod(0)
    try:
        try:
            path.read_bytes()
            pytest.skip("this user reads files without read permission (root); the simulated test covers it")
        except PermissionError:
            pass
        code, lines, out = run(["squad", root, "--out", tmp_path / "out"], capsys)
        assert_usage_error(code, lines, out, "permission denied")
    finally:
        path.chmod(0o644)


def test_athletes_csv_rules_on_good_input(tmp_path):
    """What the rules accept: a byte-order mark, empty optional cells, m/f, upper-case sides, blank lines, extra
    columns, and strength_factor (empty = 1)."""
    path = tmp_path / "athletes.csv"
    path.write_text("\ufeff" + HEADER.strip() + ",strength_factor,notes\n"
                    "QX01,74.0,1.80,M,RIGHT,2026-01-19,1.2,hamstring strain\n\n"
                    "QX02,,,f,,,,\n", encoding="utf-8")
    df = read_athletes(path)
    assert list(df["athlete"]) == ["QX01", "QX02"]
    assert list(df["sex"]) == ["male", "female"] and list(df["involved_side"]) == ["right", "none"]
    assert df.loc[0, "injury_date"] == "2026-01-19" and pd.isna(df.loc[1, "injury_date"])
    assert pd.isna(df.loc[1, "body_mass_kg"]) and df.loc[0, "body_mass_kg"] == 74.0
    assert list(df["strength_factor"]) == [1.2, 1.0] and list(df["notes"]) == ["hamstring strain", ""]


# ------------------------------------------------------------------------------------------ marker map

MAP_CASES = {
    "missing": (None, ["marker map", "not found"]),
    "bad_toml": ("[landmarks\nright_asis = 'x'\n", ["not valid TOML"]),
    "unknown_landmark": ('[landmarks]\nright_asiss = "RA"\n', ["right_asiss", "did you mean 'right_asis'"]),
    "unknown_section": ('[landmark]\nright_asis = "RA"\n', ["[landmark]", "did you mean 'landmarks'"]),
    "label_not_text": ("[landmarks]\nright_asis = 3\n", ["right_asis", "label"]),
    "empty": ("", ["is empty"]),
}


@pytest.mark.parametrize("command", ["squad", "timeline", "analyze", "landmarks"])
@pytest.mark.parametrize("case", sorted(MAP_CASES))
def test_bad_marker_map_is_one_line_and_exit_2(case, command, tmp_path, capsys):
    """Also in a squad: one message, not one per trial (it was printed once per trial, with exit code 1)."""
    content, words = MAP_CASES[case]
    root = _squad(tmp_path)
    markers = tmp_path / "markers.toml"
    if content is not None:
        markers.write_text(content, encoding="utf-8")
    trial = next(root.glob("*/*/*.c3d"))
    argv = {"squad": ["squad", root, "--out", tmp_path / "out"],
            "timeline": ["timeline", root, "--athlete", "QX01", "--out", tmp_path / "out"],
            "analyze": ["analyze", trial, "--out", tmp_path / "out"],
            "landmarks": ["landmarks", trial]}[command]
    before = _files(tmp_path)
    code, lines, out = run(argv + ["--markers", markers], capsys)
    assert_usage_error(code, lines, out, *words)
    assert _files(tmp_path) == before


def test_marker_map_that_is_a_folder(tmp_path, capsys):
    root = _squad(tmp_path)
    code, lines, out = run(["squad", root, "--out", tmp_path / "out", "--markers", tmp_path], capsys)
    assert_usage_error(code, lines, out, "marker map", "is a folder")


# ------------------------------------------------------------------------------------------ configuration

CONFIG_CASES = {
    "number_as_word": ('[flags]\nasymmetry_pct = "ten"\n', ["[flags] asymmetry_pct", '"ten"', "number"]),
    "cutoff_word": ('[analysis]\ncutoff_hz = "fast"\n', ["cutoff_hz", '"fast"', '"auto"']),
    "negative_gap": ("[analysis]\nmax_gap_frames = -4\n", ["max_gap_frames", "-4", "0 to 100"]),
    "negative_samples": ("[analysis]\nmonte_carlo_samples = -1\n", ["monte_carlo_samples", "-1"]),
    "number_in_quotes": ('[flags]\nasymmetry_pct = "10"\n', ["without quotes"]),
    "unknown_key": ("[flags]\nasymetry_pct = 12\n", ["asymetry_pct", "did you mean 'asymmetry_pct'"]),
    "wrong_section": ("[analysis]\nasymmetry_pct = 12\n", ["asymmetry_pct", "belongs in [flags]"]),
    "unknown_section": ("[flag]\nasymmetry_pct = 12\n", ["[flag]", "did you mean 'flags'"]),
    "key_outside_section": ("cutoff_hz = 12\n", ["cutoff_hz", "[analysis]"]),
    "bad_range_pair": ("[analysis]\nstride_time_range_s = [0.8, 0.3]\n", ["stride_time_range_s", "low < high"]),
    "bool_as_number": ("[analysis]\nmin_strides = true\n", ["min_strides", "whole number"]),
    "unknown_muscle": ('[flags]\nmuscles = ["biceps"]\n', ["muscles", "biceps_femoris_long"]),
    "unknown_hip_method": ('[analysis]\nhip_method = "harington"\n', ["hip_method", "did you mean 'harrington'"]),
    "bad_toml": ("[analysis\n", ["not valid TOML"]),
    "missing": (None, ["config file", "not found"]),
}


@pytest.mark.parametrize("command", ["squad", "analyze"])
@pytest.mark.parametrize("case", sorted(CONFIG_CASES))
def test_bad_config_is_one_line_and_exit_2_before_any_analysis(case, command, tmp_path, capsys):
    content, words = CONFIG_CASES[case]
    root = _squad(tmp_path)
    config = tmp_path / "config.toml"
    if content is not None:
        config.write_text(content, encoding="utf-8")
    argv = (["squad", root] if command == "squad" else ["analyze", next(root.glob("*/*/*.c3d"))])
    before = _files(tmp_path)
    code, lines, out = run(argv + ["--out", tmp_path / "out", "--config", config], capsys)
    assert_usage_error(code, lines, out, *words)
    assert _files(tmp_path) == before


# ------------------------------------------------------------------------------------------ folder layout

def test_empty_squad_folder(tmp_path, capsys):
    root = tmp_path / "empty"
    root.mkdir()
    code, lines, out = run(["squad", root, "--out", tmp_path / "out"], capsys)
    assert_usage_error(code, lines, out, "no trials to analyse", str(root))
    assert not (tmp_path / "out").exists()


def test_folder_without_athletes_csv_says_so(tmp_path, capsys):
    root = _squad(tmp_path, None)
    code, lines, out = run(["squad", root, "--out", tmp_path / "out"], capsys)
    # the warning (athletes skipped) and the error (nothing left to analyse) both name the missing athletes.csv
    assert code == 2 and "Traceback" not in out and not (tmp_path / "out").exists()
    assert lines[-1].startswith("error [no_trials]") and "there is none" in lines[-1] and "--allow-unlisted" in lines[-1]


def test_session_folder_without_a_date(tmp_path, capsys):
    root = _squad(tmp_path, sessions=(("QX01", "2026-02-02_return1"), ("QX02", "notadate")))
    code, lines, out = run(["squad", root, "--out", tmp_path / "out"], capsys)
    assert_usage_error(code, lines, out, "notadate", "YYYY-MM-DD")


def test_session_folder_with_an_impossible_date(tmp_path, capsys):
    root = _squad(tmp_path, sessions=(("QX01", "2026-13-02_x"),))
    code, lines, out = run(["squad", root, "--out", tmp_path / "out"], capsys)
    assert_usage_error(code, lines, out, "2026-13-02_x", "YYYY-MM-DD")


@pytest.mark.parametrize("what", ["missing", "file"])
def test_squad_root_that_is_not_a_folder(what, tmp_path, capsys):
    root = tmp_path / "squad.csv"
    if what == "file":
        root.write_text(HEADER)
    code, lines, out = run(["squad", root, "--out", tmp_path / "out"], capsys)
    assert_usage_error(code, lines, out, str(root))


def test_timeline_unknown_athlete_lists_the_known_codes(tmp_path, capsys):
    root = _squad(tmp_path)
    code, lines, out = run(["timeline", root, "--athlete", "QX9", "--out", tmp_path / "out"], capsys)
    assert_usage_error(code, lines, out, "QX9", "QX01, QX02")
    assert not (tmp_path / "out").exists()


def test_athlete_codes_match_without_letter_case(tmp_path):
    assert match_athlete("qx01", ["QX01", "QX02"], tmp_path) == "QX01"
    assert match_athlete(" Qx02 ", ["QX01", "QX02"], tmp_path) == "QX02"
    with pytest.raises(ConfigError, match="QX01, QX02"):
        match_athlete("QX03", ["QX01", "QX02"], tmp_path)
    with pytest.raises(ConfigError, match="QX03 is in athletes.csv but has no trials"):
        match_athlete("qx03", ["QX01", "QX02"], tmp_path, ["QX01", "QX02", "QX03"])


# ------------------------------------------------------------------------------------------ single files

@pytest.mark.parametrize("command", ["analyze", "landmarks"])
@pytest.mark.parametrize("what", ["missing", "folder"])
def test_trial_that_is_missing_or_a_folder(command, what, tmp_path, capsys):
    trial = tmp_path / ("nothing.c3d" if what == "missing" else "")
    code, lines, out = run([command, trial] + (["--out", tmp_path / "out"] if command == "analyze" else []),
                           capsys)
    assert_usage_error(code, lines, out, str(trial), "not found" if what == "missing" else "is a folder")
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("argv,words", [(["--body-mass", "780"], ["--body-mass 780", "30 and 200"]),
                                        (["--sex", "x"], ["--sex x"]),
                                        (["--cutoff", "0"], ["--cutoff"]),
                                        (["--static", "nothing.c3d"], ["static trial", "not found"])])
def test_analyze_checks_its_options(argv, words, tmp_path, capsys):
    root = _squad(tmp_path)
    trial = next(root.glob("*/*/*.c3d"))
    code, lines, out = run(["analyze", trial, "--out", tmp_path / "out"] + argv, capsys)
    assert_usage_error(code, lines, out, *words)
    assert not (tmp_path / "out").exists()


def test_unknown_option_and_missing_argument_are_one_line(tmp_path, capsys):
    code, lines, out = run(["squad", tmp_path, "--jobz", "2"], capsys)
    assert_usage_error(code, lines, out, "--jobz")
    code, lines, out = run(["timeline", tmp_path], capsys)
    assert_usage_error(code, lines, out, "--athlete")


def test_a_broken_trial_is_a_failed_trial_exit_1(tmp_path, capsys):
    """A C3D file that cannot be read is not a usage error: exit code 1, one line naming the file."""
    bad = tmp_path / "broken.c3d"
    bad.write_bytes(b"\x02\x50" + bytes(700))
    code, lines, out = run(["landmarks", bad], capsys)
    assert code == 1 and len(lines) == 1 and "broken.c3d" in lines[0] and "Traceback" not in out


def test_unexpected_error_prints_one_line_and_a_log_file(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("HAMSTRIDE_LOG_DIR", str(tmp_path / "logs"))

    def bug(*args, **kwargs):
        raise ZeroDivisionError("a deliberate bug [in brackets]")

    monkeypatch.setattr("hamstride.settings.config_toml", bug)
    code, lines, out = run(["config"], capsys)
    assert code == 3 and len(lines) == 1 and "Traceback" not in out
    assert "ZeroDivisionError" in lines[0] and "[in brackets]" in lines[0]
    logs = list((tmp_path / "logs").glob("hamstride-*.log"))
    assert len(logs) == 1 and str(logs[0]) in lines[0]
    assert "Traceback" in logs[0].read_text() and "deliberate bug" in logs[0].read_text()


def test_version(capsys):
    from hamstride import __version__

    code, _, out = run(["--version"], capsys)
    assert code == 0 and out.strip() == f"hamstride {__version__}"


def test_entry_point_in_a_subprocess(tmp_path):
    """The real `python -m hamstride.cli`: exit 2, one line on stderr, nothing on stdout, no traceback."""
    root = _squad(tmp_path, HEADER + "QX01,74.0,1.80,male,rigth,\n")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(Path(cli.__file__).parents[1]),
                                                      os.environ.get("PYTHONPATH", "")]))
    proc = subprocess.run([sys.executable, "-m", "hamstride.cli", "squad", str(root), "--out", str(tmp_path / "o")],
                          capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 2 and proc.stdout == "" and "Traceback" not in proc.stderr
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert lines == [f"error [bad_athletes] athletes.csv line 2: involved_side = 'rigth': expected left, right or "
                     "none (did you mean 'right'?)"]
    assert not (tmp_path / "o").exists()


# ------------------------------------------------------------------------------------------ runs with real trials

@pytest.fixture(scope="module")
def real_squad(tmp_path_factory):
    """Two listed athletes with one short invented sprint each, a broken trial, and an athlete folder that
    athletes.csv does not list."""
    from hamstride.synth import SprintSpec, write_sprint_trial

    base = tmp_path_factory.mktemp("real")
    root = base / "squad"
    for k, (athlete, session) in enumerate([("QX01", "2026-02-02_return1"), ("QX02", "2026-02-02_testing"),
                                            ("QX07", "2026-02-03_visit")]):
        write_sprint_trial(root / athlete / session / "sprint_01.c3d",
                           SprintSpec(duration_s=1.2, seed=40 + k, athlete=f"SUBJ{k}"))
    (root / "QX02" / "2026-02-02_testing" / "sprint_02_cut.c3d").write_bytes(
        (root / "QX02" / "2026-02-02_testing" / "sprint_01.c3d").read_bytes()[:3000])
    (root / "athletes.csv").write_text(HEADER + GOOD_ROWS, encoding="utf-8")
    config = base / "fast.toml"
    config.write_text(FAST_CONFIG)
    return base, root, config


def test_unlisted_athlete_is_skipped_with_a_warning_and_failures_listed_once(real_squad, tmp_path, capsys):
    import json

    _, root, config = real_squad
    out = tmp_path / "out"
    code, lines, text = run(["squad", root, "--out", out, "--config", config, "--no-report", "--jobs", "2"], capsys)
    assert code == 1 and "Traceback" not in text
    warnings = [line for line in lines if line.startswith("warning")]
    assert len(warnings) == 1 and "QX07" in warnings[0] and "--allow-unlisted" in warnings[0]
    listed = [line for line in text.splitlines() if "sprint_02_cut" in line]
    assert len(listed) == 1 and "[truncated]" in listed[0]  # listed once, its code visible
    manifest = json.loads((out / "manifest.json").read_text())
    status = {Path(r["file"]).parts[0] + "/" + Path(r["file"]).name: r["status"] for r in manifest["inputs"]}
    assert status == {"QX01/sprint_01.c3d": "ok", "QX02/sprint_01.c3d": "ok", "QX02/sprint_02_cut.c3d": "failed",
                      "QX07/sprint_01.c3d": "skipped"}
    assert manifest["counts"]["skipped"] == 1 and "QX07" in manifest["warnings"][0]
    assert set(pd.read_csv(out / "strides.csv")["athlete"]) == {"QX01", "QX02"}


def test_allow_unlisted_analyses_the_unlisted_athlete(real_squad, tmp_path, capsys):
    _, root, config = real_squad
    out = tmp_path / "out"
    code, lines, text = run(["squad", root, "--out", out, "--config", config, "--no-report", "--jobs", "2",
                             "--allow-unlisted"], capsys)
    assert code == 1 and "analysed without body data" in text
    assert set(pd.read_csv(out / "strides.csv")["athlete"]) == {"QX01", "QX02", "QX07"}


def test_timeline_athlete_code_ignores_letter_case(real_squad, tmp_path, capsys):
    _, root, config = real_squad
    code, _, text = run(["timeline", root, "--athlete", "qx01", "--out", tmp_path / "out", "--config", config,
                         "--jobs", "1"], capsys)
    assert code == 0, text
    assert "timeline of QX01" in text and (tmp_path / "out" / "timeline_QX01.csv").exists()


def test_analyze_outside_the_squad_layout_names_from_subject_or_file(real_squad, tmp_path, capsys):
    """Unrelated parent folders never name the athlete or session: the options, else the C3D subject name, else
    the file name."""
    from hamstride.io import read_c3d, write_c3d

    _, root, config = real_squad
    source = root / "QX01" / "2026-02-02_return1" / "sprint_01.c3d"
    loose = tmp_path / "downloads" / "2026-02-02_misc" / "my_run.c3d"  # looks dated, but no squad around it
    loose.parent.mkdir(parents=True)
    loose.write_bytes(source.read_bytes())
    trial = read_c3d(source)
    nameless = write_c3d(tmp_path / "downloads" / "no_subject.c3d", list(trial.labels), trial.xyz * 1000.0,
                         trial.rate_hz, units="mm")

    def names(argv):
        out = tmp_path / f"out{len(list(tmp_path.glob('out*')))}"
        code, _, text = run(["analyze", *argv, "--out", out, "--config", config], capsys)
        assert code == 0, text
        strides = pd.read_csv(out / "strides.csv", dtype=str)
        return strides["athlete"].iloc[0], strides["session"].iloc[0]

    assert names([loose]) == ("SUBJ0", "my_run")
    assert names([loose, "--athlete", "QX01", "--session", "2026-02-02_return1"]) == ("QX01", "2026-02-02_return1")
    assert names([nameless]) == ("no_subject", "no_subject")
    assert names([source]) == ("QX01", "2026-02-02_return1")  # inside the squad layout: its folders
    # ... and that athlete's row of athletes.csv (letter case of the folder aside)
    code, session, row = cli._trial_athlete(source, "SUBJ0", None, None, read_athletes(root / "athletes.csv"))
    assert (code, session, row["body_mass_kg"], row["sex"]) == ("QX01", "2026-02-02_return1", 74.0, "male")
    assert cli._squad_of(loose) is None and cli._squad_of(source) == root.resolve()


def test_messages_print_literally(real_squad, tmp_path, capsys):
    """Error codes in brackets and the TOML section name [landmarks] reach the screen (issue 13 item 9)."""
    _, root, _ = real_squad
    markers = tmp_path / "markers.toml"
    markers.write_text('[landmarks]\nright_heel = "R_HEEL_X"\n')
    code, lines, text = run(["landmarks", root / "QX01" / "2026-02-02_return1" / "sprint_01.c3d", "--markers",
                             markers], capsys)
    assert code == 1 and len(lines) == 1
    assert lines[0].startswith("error [landmark_missing]") and "([landmarks] section)" in lines[0]
    assert "R_HEEL_X" in text


def test_unreadable_trial_fails_alone(real_squad, tmp_path, capsys, monkeypatch):
    """A trial file that cannot be read (permissions, simulated: tests may run as root) fails as `unreadable`
    with exit code 1; the rest of the squad is analysed."""
    import hamstride.squad.run as squad_run

    _, root, config = real_squad
    target = root / "QX01" / "2026-02-02_return1" / "sprint_01.c3d"
    real = squad_run.file_sha256

    def hash_or_deny(path):
        if Path(path) == target:
            raise PermissionError(13, "Permission denied", str(path))
        return real(path)

    monkeypatch.setattr(squad_run, "file_sha256", hash_or_deny)  # the module that hashes the inputs
    code, _, text = run(["squad", root, "--out", tmp_path / "out", "--config", config, "--no-report"], capsys)
    assert code == 1 and "Traceback" not in text
    listed = [line for line in text.splitlines() if "QX01" in line and "[unreadable]" in line]
    assert len(listed) == 1 and "Permission denied" in listed[0]
    assert set(pd.read_csv(tmp_path / "out" / "strides.csv")["athlete"]) == {"QX02"}


@pytest.mark.parametrize("argv", [["demo", "{file}"], ["muscles", "--plot", "{file}/arms.png"]])
def test_output_path_that_cannot_be_written(argv, tmp_path, capsys):
    """An output path under a file (not a folder): one line naming it, exit 2, no traceback, no log file."""
    blocker = tmp_path / "a_file"
    blocker.write_text("x")
    code, lines, out = run([a.replace("{file}", str(blocker)) for a in argv], capsys)
    assert_usage_error(code, lines, out, str(blocker))
    assert lines[0].startswith("error [file_access]")


@pytest.mark.parametrize("argv", [["muscles", "--height", "-1"], ["muscles", "--height", "180"],
                                  ["muscles", "--hip-flexion", "500"], ["muscles", "--knee-flexion", "abc"]])
def test_muscles_options_are_ranged(argv, capsys):
    code, lines, out = run(argv, capsys)
    assert_usage_error(code, lines, out, argv[1])


def test_marker_map_prefix_key_is_accepted_and_checked(tmp_path):
    """The top-level `prefix` key (whose markers a two-subject file uses) is a known key, typed by the loader."""
    from hamstride.squadinput import check_marker_map

    path = tmp_path / "markers.toml"
    path.write_text('prefix = "Ath07"\n[landmarks]\nright_asis = "RA"\n')
    assert check_marker_map(path).prefix == "Ath07"
    path.write_text('prefix = 7\n[landmarks]\nright_asis = "RA"\n')
    with pytest.raises(ConfigError, match="prefix"):
        check_marker_map(path)
    path.write_text('prefx = "Ath07"\n')
    with pytest.raises(ConfigError, match="did you mean"):
        check_marker_map(path)
