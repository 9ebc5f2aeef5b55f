"""Command line: help with examples, exit codes, one-line errors, config round trip."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from hamstride.batch import load_config
from hamstride.cli import app

COMMANDS = ["analyze", "squad", "timeline", "landmarks", "demo", "muscles", "config"]
DEMO = Path(__file__).resolve().parents[1] / "demo_trials"
runner = CliRunner()


def test_main_help_shows_example_and_caution():
    result = runner.invoke(app, ["--help"])
    assert result.exit_code == 0
    assert "Example" in result.output and "not a diagnosis" in result.output


@pytest.mark.parametrize("command", COMMANDS)
def test_every_command_help_has_an_example(command):
    result = runner.invoke(app, [command, "--help"])
    assert result.exit_code == 0, result.output
    assert "Example" in result.output


def test_usage_error_exit_code_2():
    result = runner.invoke(app, ["squad"])
    assert result.exit_code == 2


@pytest.mark.parametrize("content,words", [(b"", "empty"), (b"not a c3d file at all\n" * 100, "not a C3D"),
                                           (b"\x02\x50" + b"\x00" * 700, "too short")])
def test_bad_file_one_line_error_exit_1(tmp_path, content, words):
    bad = tmp_path / "broken.c3d"
    bad.write_bytes(content)
    proc = subprocess.run([sys.executable, "-m", "hamstride.cli", "landmarks", str(bad)], capture_output=True,
                          text=True)
    assert proc.returncode == 1
    assert "Traceback" not in proc.stderr + proc.stdout
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "broken.c3d" in lines[0] and words in lines[0], proc.stderr


def test_config_prints_defaults_that_load_back(tmp_path):
    result = runner.invoke(app, ["config"])
    assert result.exit_code == 0
    path = tmp_path / "config.toml"
    path.write_text(result.output)
    config = load_config(path)
    assert config.flags.asymmetry_pct == 10.0 and config.analysis.cutoff_hz is None


def test_landmarks_command_on_demo_trial():
    trials = sorted(DEMO.glob("*/*/sprint_*.c3d"))
    if not trials:
        pytest.skip("demo squad not generated")
    result = runner.invoke(app, ["landmarks", str(trials[0])])
    assert result.exit_code == 0, result.output
    assert "right lateral epicondyle" in result.output and "r.knee.lat" in result.output


def test_landmarks_command_missing_landmark_suggests_labels(tmp_path):
    trials = sorted(DEMO.glob("*/*/sprint_*.c3d"))
    if not trials:
        pytest.skip("demo squad not generated")
    markers = tmp_path / "markers.toml"
    markers.write_text('[landmarks]\nright_heel = "R_HEEL_X"\n')
    result = runner.invoke(app, ["landmarks", str(trials[0]), "--markers", str(markers)])
    assert result.exit_code == 1
    assert "right heel" in result.output and "R_HEEL_X" in result.output
