"""The main job end to end on the shipped demo squad (issue 6 acceptance).

The demo squad is invented (synth stage); the expected outcomes follow from how it was built: a returning athlete
with a right-side deficit that shrinks over three sessions, and symmetric athletes with ordinary stride noise.
"""
from __future__ import annotations

import io
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from hamstride.cli import app

DEMO = Path(__file__).resolve().parents[1] / "demo_trials"
pytestmark = pytest.mark.skipif(not (DEMO / "athletes.csv").exists(), reason="demo squad not generated")


@pytest.fixture(scope="module")
def squad_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("squad") / "demo"
    shutil.copytree(DEMO, root)
    # A corrupt trial inside the squad: the first 3 kB of a real file.
    first = sorted(root.glob("*/*/sprint_*.c3d"))[0]
    (first.parent / "sprint_99_cut.c3d").write_bytes(first.read_bytes()[:3000])
    out = root.parent / "out"
    result = CliRunner().invoke(app, ["squad", str(root), "--out", str(out), "--jobs", "2"])
    return root, out, result


def _athletes():
    return pd.read_csv(DEMO / "athletes.csv", dtype={"athlete": str})


def test_corrupt_trial_fails_alone_with_exit_code_1(squad_run):
    root, out, result = squad_run
    assert result.exit_code == 1, result.output
    manifest = json.loads((out / "manifest.json").read_text())
    failed = [r for r in manifest["inputs"] if r["status"] == "failed"]
    assert [Path(r["file"]).name for r in failed] == ["sprint_99_cut.c3d"]
    assert failed[0]["code"] == "truncated" and "sprint_99_cut.c3d" in failed[0]["reason"]
    assert "sprint_99_cut.c3d" in result.output
    ok = [r for r in manifest["inputs"] if r["status"] == "ok"]
    assert len(ok) == len(list(DEMO.glob("*/*/sprint_*.c3d")))
    assert all(len(r["sha256"]) == 64 for r in manifest["inputs"])
    assert manifest["version"] and manifest["configuration"]["flags"]["asymmetry_pct"] == 10.0


def test_tables_follow_the_export_contract(squad_run):
    _, out, _ = squad_run
    strides = pd.read_csv(out / "strides.csv")
    # design.md required columns
    for col in ["athlete", "session", "trial", "side", "stride", "muscle", "foot_strike_s", "toe_off_s",
                "next_foot_strike_s", "stride_time_s", "toe_off_pct", "peak_hip_flexion_deg", "peak_knee_flexion_deg",
                "peak_strain_pct", "peak_strain_time_pct", "peak_fibre_length_lopt",
                "peak_lengthening_velocity_lopt_per_s", "negative_work_j"]:
        assert col in strides.columns, col
    curves = pd.read_csv(out / "curves.csv", nrows=5000)
    for col in ["athlete", "session", "trial", "side", "stride", "muscle", "pct", "hip_flexion_deg",
                "hip_adduction_deg", "knee_flexion_deg", "length_m", "strain_pct", "fibre_length_lopt",
                "velocity_lopt_per_s", "force_n", "power_w"]:
        assert col in curves.columns, col
    assert set(strides["muscle"]) >= {"biceps_femoris_long", "semitendinosus", "semimembranosus"}
    assert set(strides["side"]) == {"left", "right"}
    flags = pd.read_csv(out / "flags.csv")
    assert list(flags.columns) == ["athlete", "session", "side", "muscle", "flag", "value", "threshold", "message"]
    assert (out / "summary.csv").exists() and (out / "index.html").exists()


def test_returning_athlete_flagged_first_session_less_in_last(squad_run):
    _, out, _ = squad_run
    athletes = _athletes()
    returning = athletes[athletes["involved_side"] == "right"]["athlete"].iloc[0]
    flags = pd.read_csv(out / "flags.csv", dtype={"athlete": str})
    mine = flags[(flags["athlete"] == returning) & flags["flag"].isin(["involved_side_guarding", "side_asymmetry"])]
    sessions = sorted(pd.read_csv(out / "summary.csv", dtype={"athlete": str}).query("athlete == @returning")["session"].unique())
    assert len(sessions) == 3
    first = mine[mine["session"] == sessions[0]]
    last = mine[mine["session"] == sessions[-1]]
    assert len(first) > 0, "first session of the returning athlete must be flagged"
    assert len(last) < len(first)


def test_symmetric_athletes_get_no_asymmetry_flag(squad_run):
    _, out, _ = squad_run
    athletes = _athletes()
    symmetric = set(athletes[athletes["involved_side"].fillna("none") == "none"]["athlete"])
    flags = pd.read_csv(out / "flags.csv", dtype={"athlete": str})
    wrong = flags[flags["athlete"].isin(symmetric) & (flags["flag"] == "side_asymmetry")]
    assert wrong.empty, wrong.to_string()


def test_rerun_uses_cache_and_is_byte_identical(squad_run):
    root, out, _ = squad_run
    before = {name: (out / name).read_bytes() for name in ("strides.csv", "curves.csv", "summary.csv", "flags.csv")}
    result = CliRunner().invoke(app, ["squad", str(root), "--out", str(out), "--jobs", "2", "--no-report"])
    assert result.exit_code == 1
    assert " 0 analysed" in result.output.replace("(0 analysed", " 0 analysed")
    for name, data in before.items():
        assert (out / name).read_bytes() == data, name
    assert not list(out.rglob("*.partial*"))


def test_timeline_reads_cache_and_leaves_squad_tables_alone(squad_run):
    root, out, _ = squad_run
    before = {name: (out / name).read_bytes() for name in ("strides.csv", "summary.csv", "flags.csv")}
    returning = _athletes().query("involved_side == 'right'")["athlete"].iloc[0]
    result = CliRunner().invoke(app, ["timeline", str(root), "--athlete", returning, "--out", str(out)])
    # exit 1 because the corrupt trial of the fixture squad is listed again; the timeline is still written
    assert result.exit_code in (0, 1), result.output
    timeline = pd.read_csv(out / f"timeline_{returning}.csv")
    assert timeline["session"].nunique() == 3
    assert list(timeline["days_since_injury"].drop_duplicates()) == sorted(timeline["days_since_injury"].unique())
    assert (out / f"timeline_{returning}.png").exists() and (out / f"timeline_{returning}.html").exists()
    for name, data in before.items():
        assert (out / name).read_bytes() == data, name


# The fast CSV writer must give exactly pandas' text (the reference: DataFrame.to_csv with the same settings).
_PANDAS_CSV = {"index": False, "lineterminator": "\n", "float_format": "%.6g"}


def test_table_csv_is_pandas_to_csv_on_awkward_cells():
    from hamstride.batch import table_csv

    table = pd.DataFrame({
        "text": ["a,b", 'say "hi"', "two\nlines", None, "ü ñ 漢", " lead", "", "cr\rhere"],
        "number": [1.5, np.nan, np.inf, -0.0, 1e-300, 123456789.0, -np.inf, 0.1 + 0.2],
        "count": [1, 2, 3, 4, 5, 6, 7, -8],
        "flag": [True, False, True, True, False, False, True, False],
        "label": pd.array(["s", None, "t", "u", "v", "w", "x", "y"], dtype="str"),
    })
    assert table_csv(table) == table.to_csv(**_PANDAS_CSV)
    mixed = pd.DataFrame({"anything": [1, "x", 2.5]})  # not handled by the fast path: pandas writes it
    assert table_csv(mixed) == mixed.to_csv(**_PANDAS_CSV)
    long_mixed = pd.DataFrame({"text": ["a"] * 5000 + [7] * 3, "x": np.linspace(0, 1, 5003)})  # blocks of both kinds
    assert table_csv(long_mixed) == long_mixed.to_csv(**_PANDAS_CSV)
    assert table_csv(table.iloc[:0]) == table.iloc[:0].to_csv(**_PANDAS_CSV)
    for name in ("text", "number", "label"):  # a table of one column: an empty cell is a row of its own ("")
        assert table_csv(table[[name]]) == table[[name]].to_csv(**_PANDAS_CSV), name


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.one_of(st.none(), st.text(max_size=12)),
                          st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**12, 10**12),
                          st.booleans()), min_size=1, max_size=15))
def test_table_csv_is_pandas_to_csv_for_any_cells(rows):
    from hamstride.batch import table_csv

    table = pd.DataFrame(rows, columns=["text", "number", "count", "flag"])
    assert table_csv(table) == table.to_csv(**_PANDAS_CSV)


def test_columns_csv_is_pandas_to_csv_of_the_same_columns():
    # batch.columns_csv writes a trial's tables straight from its numpy columns (numpy text arrays included); the
    # reference is pandas' to_csv of the DataFrame those columns make.
    from hamstride.batch import columns_csv

    columns = {
        "text": np.array(["a,b", 'say "hi"', "two\nlines", "ü ñ 漢", " lead", "", "cr\rhere", "x"]),
        "objects": np.array(["s", None, "t", "u", "v", "w", "x", "y"], dtype=object),
        "number": np.array([1.5, np.nan, np.inf, -0.0, 1e-300, 123456789.0, -np.inf, 0.1 + 0.2]),
        "count": np.arange(8) - 3,
    }
    assert columns_csv(columns) == pd.DataFrame(columns).to_csv(**_PANDAS_CSV)
    mixed = {"anything": np.array([1, "x", 2.5], dtype=object), "x": np.arange(3.0)}  # pandas writes this block
    assert columns_csv(mixed) == pd.DataFrame(mixed).to_csv(**_PANDAS_CSV)
    long = {"side": np.repeat(np.array(["left", "right"]), 2600), "v": np.linspace(0, 1, 5200)}  # several blocks
    assert columns_csv(long) == pd.DataFrame(long).to_csv(**_PANDAS_CSV)
    empty = {name: values[:0] for name, values in columns.items()}
    assert columns_csv(empty) == pd.DataFrame(empty).to_csv(**_PANDAS_CSV)


def test_tuned_allocator_stops_the_page_faults_of_each_analysis(tmp_path):
    # batch.tune_allocator lets glibc reuse freed memory: after it, analysing a trial again should map next to no
    # fresh pages (minor page faults, counted by the kernel; without it about 450 per 2 s trial on Linux/glibc).
    import subprocess
    import sys
    import textwrap

    from hamstride.synth import SprintSpec, write_sprint_trial

    trial = tmp_path / "t.c3d"
    write_sprint_trial(trial, SprintSpec(duration_s=2.0, seed=4))
    script = textwrap.dedent(f"""
        import resource, sys
        from hamstride.batch import tune_allocator
        if not tune_allocator():
            print("unavailable"); sys.exit(0)
        from hamstride.pipeline import AnalysisOptions, AthleteInfo, analyse_trial
        athlete = AthleteInfo(body_mass_kg=75.0)
        for _ in range(2):
            analyse_trial({str(trial)!r}, AnalysisOptions(), athlete=athlete)
        before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
        for _ in range(3):
            analyse_trial({str(trial)!r}, AnalysisOptions(), athlete=athlete)
        print((resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before) / 3)
    """)
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True).stdout.strip()
    if out == "unavailable":
        pytest.skip("no glibc mallopt here")
    assert float(out) < 50, out


def test_exports_are_pandas_text_of_each_trials_own_tables(squad_run):
    # The squad's tables make one binary pass (worker -> binary .npy cache -> CSV once). Reference: pandas' to_csv of the
    # tables analyse_trial returns in memory (no cache), and pandas' read_csv of that text for the squad tables, as
    # hamstride did before the binary cache (strides CSV text parsed back; main 9308986): byte-identical files.
    from hamstride.metrics import summarise
    from hamstride.pipeline import AnalysisOptions, analyse_trial
    from hamstride.squad.discovery import discover_squad

    root, out, _ = squad_run
    _, jobs = discover_squad(root)
    csv_args = {"index": False, "lineterminator": "\n", "float_format": "%.6g"}
    strides_text, curves_text = [], []
    for job in jobs:
        if job.path.endswith("_cut.c3d"):
            continue
        result = analyse_trial(job.path, AnalysisOptions(), athlete=job.info, static_path=job.static_path)
        strides_text.append(result.strides.to_csv(header=not strides_text, **csv_args))
        curves_text.append(result.curves.to_csv(header=not curves_text, **csv_args))
    assert (out / "curves.csv").read_text() == "".join(curves_text)
    strides = pd.read_csv(io.StringIO("".join(strides_text)), dtype={"athlete": str, "session": str, "trial": str})
    strides = strides.sort_values(["athlete", "session", "trial", "side", "stride", "muscle"], kind="stable")
    assert (out / "strides.csv").read_text() == strides.to_csv(**csv_args)
    assert (out / "summary.csv").read_text() == summarise(strides, _athletes()).to_csv(**csv_args)
    athlete = jobs[-1].athlete
    mine = "".join(t for t, job in zip(curves_text, [j for j in jobs if not j.path.endswith("_cut.c3d")])
                   if job.athlete == athlete)
    header = curves_text[0].split("\n", 1)[0] + "\n"
    assert (out / "athletes" / f"{athlete}_curves.csv").read_text() == header + mine.removeprefix(header)
    cache = out / ".hamstride-cache"
    assert not list(cache.glob("*.csv")) and list(cache.glob("*.tables.npy"))  # binary cache, no CSV text


def test_exported_frame_is_what_read_csv_gives_back():
    # squad.export.exported_frame builds the squad's strides table with the values strides.csv holds; reference:
    # pandas read_csv of pandas' to_csv text of the same columns (six significant digits, whole-number float
    # columns read as integers, empty text as missing).
    from hamstride.squad.export import exported_frame

    tables = [{"athlete": np.array(["A1", "A1"]), "trial": np.array(["01", "02"]),
               "value": np.array([1 / 3, np.nan]), "whole": np.array([2.0, 3.0]), "big": np.array([1.23456789e7, -0.0]),
               "status": np.array(["ok", None], dtype=object), "n": np.array([1, 2])},
              {"athlete": np.array(["B2"]), "trial": np.array(["03"]), "value": np.array([np.inf]),
               "whole": np.array([4.0]), "big": np.array([5e-300]), "status": np.array(["", ], dtype=object),
               "n": np.array([3])}]
    names = list(tables[0])
    got = exported_frame(tables, names)
    text = pd.concat([pd.DataFrame(t) for t in tables]).to_csv(index=False, lineterminator="\n", float_format="%.6g")
    expected = pd.read_csv(io.StringIO(text), dtype={"athlete": str, "trial": str})
    pd.testing.assert_frame_equal(got, expected)


def test_static_trial_is_calibrated_once_per_file_and_again_when_it_changes(tmp_path):
    # pipeline.static_calibration: the sprints of a session share one calibration; a rewritten static file
    # (new size/modification time) is read again.
    import os

    from hamstride.landmarks import load_marker_map
    from hamstride.pipeline import static_calibration

    static = tmp_path / "static.c3d"
    by_athlete = {p.parent.parent.name: p for p in sorted(DEMO.glob("*/*/static.c3d"))}
    source = list(by_athlete.values())  # two athletes of different heights
    static.write_bytes(source[0].read_bytes())
    mm = load_marker_map(None)
    first = static_calibration(static, mm)
    assert static_calibration(static, load_marker_map(None)) is first  # same file, equal map: shared
    static.write_bytes(source[1].read_bytes())
    os.utime(static, ns=(1, 1))
    again = static_calibration(static, mm)
    assert again is not first
    assert again[1].leg_length_m != pytest.approx(first[1].leg_length_m, abs=1e-3)


def test_worker_modules_load_neither_pandas_nor_the_squad_run():
    import subprocess
    import sys

    # The command starts the process its workers fork from first of all (squad.workers: not even numpy), and that
    # process loads the stages while the command itself loads pandas and checks the inputs (issue 17): the stages
    # must not need pandas, and the executor must not load the squad run.
    script = ("import sys; import hamstride.squad.workers; assert 'numpy' not in sys.modules; "
              "import hamstride.squad.executor as ex; assert 'pandas' not in sys.modules; "
              "ex._load_stages(); print(sorted(m for m in ('pandas', 'hamstride.squad.run') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_session_chunks_keep_order_group_sessions_and_shrink_towards_the_end():
    # Guided scheduling (common practice): consecutive trials of a session with a static trial share a task, at most
    # remaining / (2 x workers) of them, so each session is calibrated once and the workers finish together.
    from hamstride.pipeline import AthleteInfo
    from hamstride.squad.discovery import TrialJob
    from hamstride.squad.executor import session_chunks

    def job(athlete, session, trial, static=True):
        return TrialJob(f"/{athlete}/{session}/{trial}.c3d", athlete, session,
                        f"/{athlete}/{session}/static.c3d" if static else None, AthleteInfo(athlete, session))

    todo = [(job(f"A{a}", "s1", f"t{t}"), f"k{a}{t}") for a in range(8) for t in range(3)]  # 8 sessions x 3
    chunks = session_chunks(todo, 2)
    assert [item for chunk in chunks for item in chunk] == todo  # the same trials, in the same order
    assert all(len({(j.athlete, j.session) for j, _ in chunk}) == 1 for chunk in chunks)  # one session per task
    sizes = [len(c) for c in chunks]
    assert sizes[:4] == [3, 3, 3, 3] and sizes[-3:] == [1, 1, 1]  # whole sessions first, single trials at the end
    for k, chunk in enumerate(chunks):  # never more than the remaining trials / (2 x workers), rounded up
        remaining = len(todo) - sum(sizes[:k])
        assert len(chunk) <= max(1, -(-remaining // 4))
    assert session_chunks(todo, 1) == [[item] for item in todo]  # one worker calibrates each session once anyway
    no_static = [(job("B", "s", f"t{t}", static=False), f"b{t}") for t in range(6)]
    assert session_chunks(no_static, 2) == [[item] for item in no_static]  # nothing to share: single trials
    big = [(job("C", "s", f"t{t}"), f"c{t}") for t in range(40)]  # one big session: split, still in order
    assert [item for chunk in session_chunks(big, 2) for item in chunk] == big
    assert max(len(c) for c in session_chunks(big, 2)) == 10
