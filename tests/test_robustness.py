"""The bad-input corpus: every way a lab's export can go wrong gives its own error code and a one-line message that
names the trial and says what to do, never a traceback; a squad run over the whole corpus lists every file.

The corpus is built here from the synthetic sprint (hamstride.synth) and hamstride.io.write_c3d, then damaged in
the named ways. Byte offsets follow the C3D layout of the c3d.org user guide (header words, parameter records).
"""
from __future__ import annotations

import json
import os
import struct
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from hamstride.errors import HamstrideError
from hamstride.io import check_c3d_header, read_c3d, write_c3d
from hamstride.pipeline import AnalysisOptions, AthleteInfo, analyse_trial
from hamstride.synth import SprintSpec, simulate_sprint, simulate_walk

RATE = 250.0
FAST = AnalysisOptions(monte_carlo_samples=0)  # the checks under test do not depend on the uncertainty band
ATHLETE = AthleteInfo(athlete="CORPUS", session="2026-01-05_bad", body_mass_kg=75.0)


@dataclass(frozen=True)
class Case:
    path: Path
    code: str  # expected error code, or "ok" (with `warning` = a warning code that must be present)
    phrase: str  # a piece of the message that tells the user what is wrong or what to do
    warning: str | None = None
    strict_code: str | None = None  # the code --strict gives instead (for warning cases)


# ------------------------------------------------------------------------------------------------ building blocks

def _base(duration_s: float = 1.2, **spec) -> tuple[list[str], np.ndarray]:
    labels, xyz, _ = simulate_sprint(SprintSpec(duration_s=duration_s, rate_hz=spec.pop("rate_hz", RATE), n_gaps=0,
                                                include_clusters=spec.pop("include_clusters", True), **spec))
    return list(labels), np.array(xyz, dtype=float)


def _header_word(data: bytearray, word: int, value: int) -> None:
    """Set 16-bit header word ``word`` (1-based, c3d.org numbering: word 2 = points, 4 = first frame, 5 = last)."""
    data[2 * (word - 1):2 * word] = struct.pack("<H", value)


def _param_record(data: bytes, group: str, name: str) -> tuple[int, int, int]:
    """(record start, name length, id) of parameter GROUP:NAME, found by walking the records (c3d.org layout)."""
    start = 512 * (data[0] - 1)
    pos = start + 4
    groups: dict[int, str] = {}
    while True:
        n, ident = struct.unpack("bb", data[pos:pos + 2])
        n = abs(n)
        label = data[pos + 2:pos + 2 + n].decode()
        (offset,) = struct.unpack("<h", data[pos + 2 + n:pos + 4 + n])
        if ident < 0:
            groups[-ident] = label
        elif groups.get(ident) == group and label == name:
            return pos, n, ident
        if offset == 0:
            raise KeyError(f"{group}:{name}")
        pos += 2 + n + offset


def _param_value_offset(data: bytes, group: str, name: str) -> int:
    """Byte offset of the first data value of GROUP:NAME (after type, number of dimensions and dimensions)."""
    pos, n, _ = _param_record(data, group, name)
    n_dims = data[pos + 4 + n + 1]
    return pos + 4 + n + 2 + n_dims


def build_corpus(folder: Path) -> dict[str, Case]:
    """Write every corpus file into ``folder`` and return name -> expected outcome."""
    folder.mkdir(parents=True, exist_ok=True)
    cases: dict[str, Case] = {}
    labels, xyz = _base()
    valid = write_c3d(folder / "valid.c3d", labels, xyz, RATE)
    good = valid.read_bytes()

    def put(name: str, data: bytes, code: str, phrase: str, **kw) -> None:
        path = folder / f"{name}.c3d"
        path.write_bytes(data)
        cases[name] = Case(path, code, phrase, **kw)

    def write(name: str, lab, pts, code: str, phrase: str, rate: float = RATE, units: str = "mm", **kw) -> None:
        cases[name] = Case(write_c3d(folder / f"{name}.c3d", lab, pts, rate, units=units), code, phrase, **kw)

    cases["valid"] = Case(valid, "ok", "")
    put("empty_file", b"", "empty_file", "empty")
    put("random_bytes", np.random.default_rng(7).integers(0, 256, 6000, dtype=np.uint8).tobytes(), "not_c3d",
        "not a C3D")
    # Truncated at ten places: inside the header, the parameter section, at the data start and through the data.
    data_start = 512 * (struct.unpack("<H", good[16:18])[0] - 1)
    data_end = data_start + xyz.shape[0] * xyz.shape[1] * 16  # float data: 4 words of 4 bytes per point and frame
    # Cut inside the data block, the whole frames that remain are read (ezc3d and the `c3d` package read them
    # alike; refusing them was our bug, issue 13) with a frames_missing warning: a third of the trial is too short
    # for a stride per leg, three quarters and all but one frame analyse.
    frame_bytes = xyz.shape[1] * 16
    for k, cut in enumerate([100, 700, 1100, 1500, 2000, data_start, data_start + 77, len(good) // 3,
                             (3 * len(good)) // 4, data_end - 1]):
        if cut < data_start + frame_bytes:
            put(f"truncated_{k:02d}_at_{cut}", good[:cut], "truncated", "truncated" if cut < 1024 else "")
        elif cut < len(good) // 2:
            put(f"truncated_{k:02d}_at_{cut}", good[:cut], "few_strides", "stride")
        else:
            put(f"truncated_{k:02d}_at_{cut}", good[:cut], "ok", "", warning="frames_missing",
                strict_code="frames_missing")

    # Header and parameter bytes mutated.
    def mutated(name: str, edit, code: str, phrase: str, **kw) -> None:
        data = bytearray(good)
        edit(data)
        put(name, bytes(data), code, phrase, **kw)

    mutated("header_key_byte", lambda d: d.__setitem__(1, 0x00), "not_c3d", "0x50")
    mutated("header_parameter_block_self", lambda d: d.__setitem__(0, 1), "bad_header", "the header itself")
    mutated("header_parameter_block_wrong", lambda d: d.__setitem__(0, 40), "bad_header", "processor type")
    mutated("parameter_processor_type", lambda d: d.__setitem__(512 * (good[0] - 1) + 3, 99), "bad_header",
            "processor type")
    # ezc3d and `c3d` both read a file whose parameter section claims 0 blocks (refusing it was our bug, issue 13)
    mutated("parameter_block_count_zero", lambda d: d.__setitem__(512 * (good[0] - 1) + 2, 0), "ok", "")
    mutated("header_rate_negative", lambda d: d.__setitem__(slice(20, 24), struct.pack("<f", -250.0)), "bad_rate",
            "positive")
    mutated("header_data_start_inside_parameters", lambda d: _header_word(d, 9, 2), "bad_header",
            "inside the parameter section")
    rate_at = _param_value_offset(good, "POINT", "RATE")
    mutated("parameter_rate_zero", lambda d: d.__setitem__(slice(rate_at, rate_at + 4), struct.pack("<f", 0.0)),
            "bad_rate", "positive")
    used_at = _param_value_offset(good, "POINT", "USED")
    mutated("parameter_used_disagrees", lambda d: d.__setitem__(slice(used_at, used_at + 2), struct.pack("<h", 31)),
            "bad_parameters", "POINT:USED")
    scale_at = _param_value_offset(good, "POINT", "SCALE")
    mutated("parameter_scale_sign", lambda d: d.__setitem__(slice(scale_at, scale_at + 4), struct.pack("<f", 0.1)),
            "bad_parameters", "POINT:SCALE")
    frames_at = _param_value_offset(good, "POINT", "FRAMES")
    mutated("parameter_frames_disagree", lambda d: d.__setitem__(slice(frames_at, frames_at + 2),
                                                                 struct.pack("<h", 7)), "bad_parameters",
            "POINT:FRAMES")
    pos, n, _ = _param_record(good, "POINT", "LABELS")

    def fewer_labels(d: bytearray) -> None:
        """Keep 20 of the 32 labels: shrink the dimension, cut the 12 strings out, shift the following records
        (offsets are relative) and pad the parameter section so the data blocks stay where they are."""
        width, count = d[pos + 4 + n + 2], d[pos + 4 + n + 3]
        values = pos + 4 + n + 4
        cut = slice(values + 20 * width, values + count * width)
        removed = cut.stop - cut.start
        d[pos + 4 + n + 3] = 20
        (offset,) = struct.unpack("<h", d[pos + 2 + n:pos + 4 + n])
        d[pos + 2 + n:pos + 4 + n] = struct.pack("<h", offset - removed)
        del d[cut]
        d[data_start - removed:data_start - removed] = bytes(removed)

    mutated("parameter_fewer_labels", fewer_labels, "bad_labels", "only 20 labels")
    mutated("parameter_offset_backwards",
            lambda d: d.__setitem__(slice(pos + 2 + n, pos + 4 + n), struct.pack("<h", -40)), "bad_parameters",
            "points backwards")
    rot, rn, _ = _param_record(good, "ROTATION", "LABELS")  # ezc3d 1.7 segfaults on this one (see test_fuzz)
    mutated("parameter_211_dimensions", lambda d: d.__setitem__(rot + 4 + rn + 1, 211), "bad_parameters",
            "corrupt")
    mutated("parameter_unknown_type", lambda d: d.__setitem__(pos + 4 + n, 3), "bad_parameters", "data type")

    # Frame counts: more frames promised than stored; zero frames.
    n_frames = xyz.shape[0]

    def more_frames(d: bytearray) -> None:
        _header_word(d, 5, n_frames + 100)
        d[frames_at:frames_at + 2] = struct.pack("<h", n_frames + 100)

    # Both readers read the frames that are there (issue 13): a warning says how many the header promised.
    mutated("frame_count_beyond_data", more_frames, "ok", "", warning="frames_missing", strict_code="frames_missing")
    # A header last frame of 0 with POINT:FRAMES intact: both readers read POINT:FRAMES' frames (issue 13).
    mutated("zero_frames", lambda d: _header_word(d, 5, 0), "ok", "")
    # Both the header and POINT:FRAMES say 0 frames: nothing to read.
    mutated("zero_frames_everywhere", lambda d: (_header_word(d, 5, 0), d.__setitem__(slice(frames_at, frames_at + 2),
                                                                                     struct.pack("<h", 0))),
            "no_frames", "no frames")
    write("one_frame", labels, xyz[:1], "too_short", "1 frame")

    # Data that read fine but are not an analysable sprint.
    write("rate_50hz", labels, xyz[::5], "rate_too_low", "50 Hz", rate=50.0)  # every 5th frame: sampled at 50 Hz
    # Too slow: a 6 m/s run slowed in time by 250/100 (2.4 m/s, with a flight phase) is below the 2.5 m/s floor.
    # (This case was a 3.6 m/s jog refused as not_sprint; return-to-run jogs from about 3 m/s are analysed now.)
    lab_j, xyz_j = _base(duration_s=2.5, speed_m_s=6.0)
    write("too_slow", lab_j, xyz_j, "not_sprint", "jogging pace", rate=100.0)
    # A walk (double support, no flight): refused as not a run, whatever its speed.
    lab_w, xyz_w, _ = simulate_walk(duration_s=3.0, seed=3)
    write("walk", list(lab_w), np.array(xyz_w), "not_running", "not a run")
    swap = {lab: ("l" + lab[1:] if lab.startswith("r.") else "r" + lab[1:] if lab.startswith("l.") else lab)
            for lab in labels}
    write("left_right_swapped", [swap[lab] for lab in labels], xyz, "sides_swapped", "right_asis")
    write("metres_labelled_mm", labels, xyz / 1000.0, "units_suspect", "look like 'm'")
    write("centimetres_labelled_m", labels, xyz / 10.0, "units_suspect", "100 times too large", units="m")
    wide = xyz.copy()
    right_asis, left_asis = labels.index("r.asis"), labels.index("l.asis")
    lateral = (wide[:, right_asis] - wide[:, left_asis]) / np.linalg.norm(wide[:, right_asis] - wide[:, left_asis],
                                                                          axis=1, keepdims=True)
    wide[:, right_asis] += 220.0 * lateral  # right ASIS marker 22 cm further out
    write("pelvis_too_wide", labels, wide, "pelvis_width", "ASIS")
    keep = [i for i, lab in enumerate(labels) if lab != "r.heel"]
    write("landmark_missing", [labels[i] for i in keep], xyz[:, keep], "landmark_missing", "right heel")
    gappy = xyz.copy()
    heel = labels.index("r.heel")
    gappy[int(0.2 * n_frames):int(0.8 * n_frames), heel] = np.nan  # 60 % of the trial
    write("landmark_nan_60pct", labels, gappy, "long_gap", "60%")
    dup = list(labels)
    dup[labels.index("r.thigh.a")] = "r.heel"
    write("duplicate_landmark_label", dup, xyz, "duplicate_labels", "r.heel")
    dup2 = list(labels)
    dup2[labels.index("r.thigh.b")] = "r.thigh.a"
    write("duplicate_other_label", dup2, xyz, "ok", "", warning="duplicate_labels", strict_code="duplicate_labels")
    blank = xyz.copy()
    blank[100:110] = np.nan
    write("frames_all_missing", labels, blank, "ok", "", warning="empty_frames", strict_code="empty_frames")
    write("all_frames_missing", labels, np.full_like(xyz, np.nan), "no_marker_data", "every marker")
    inf = xyz.copy()
    inf[50:53, labels.index("l.thigh.c"), 0] = np.inf
    write("infinite_coordinates", labels, inf, "ok", "", warning="bad_coordinates", strict_code="bad_coordinates")
    write("mostly_infinite", labels, np.where(np.arange(n_frames)[:, None, None] % 2 == 0, np.inf, xyz),
          "bad_coordinates", "corrupt")
    short_l, short_x = _base(duration_s=0.5)
    write("few_strides", short_l, short_x, "few_strides", "stride")
    lab_units = list(labels)
    write("unknown_units", lab_units, xyz, "bad_units", "POINT:UNITS", units="furlong")
    return cases


@pytest.fixture(scope="module")
def corpus(tmp_path_factory) -> dict[str, Case]:
    return build_corpus(tmp_path_factory.mktemp("corpus") / "CORPUS" / "2026-01-05_bad")


def _outcome(path: Path, options: AnalysisOptions = FAST):
    try:
        result = analyse_trial(path, options, athlete=ATHLETE)
        return "ok", result
    except HamstrideError as exc:
        return exc.code, exc


CASE_NAMES = [
    "valid", "empty_file", "random_bytes", *[f"truncated_{k:02d}" for k in range(10)], "header_key_byte",
    "header_parameter_block_self", "header_parameter_block_wrong", "parameter_processor_type", "parameter_block_count_zero",
    "header_rate_negative", "header_data_start_inside_parameters", "parameter_rate_zero", "parameter_used_disagrees",
    "parameter_scale_sign", "parameter_frames_disagree", "parameter_fewer_labels", "parameter_offset_backwards",
    "parameter_211_dimensions", "parameter_unknown_type", "frame_count_beyond_data", "zero_frames",
    "zero_frames_everywhere", "one_frame",
    "rate_50hz", "too_slow", "walk", "left_right_swapped", "metres_labelled_mm", "centimetres_labelled_m",
    "pelvis_too_wide",
    "landmark_missing", "landmark_nan_60pct", "duplicate_landmark_label", "duplicate_other_label",
    "frames_all_missing", "all_frames_missing", "infinite_coordinates", "mostly_infinite", "few_strides",
    "unknown_units",
]


def _case(corpus: dict[str, Case], name: str) -> Case:
    matches = [v for k, v in corpus.items() if k == name or k.startswith(name + "_at_")]
    assert len(matches) == 1, name
    return matches[0]


def test_corpus_names_are_all_tested(corpus):
    assert sorted(corpus) == sorted(k if k in corpus else next(c for c in corpus if c.startswith(k + "_at_"))
                                    for k in CASE_NAMES)


@pytest.mark.parametrize("name", CASE_NAMES)
def test_corpus_case(corpus, name):
    case = _case(corpus, name)
    code, detail = _outcome(case.path)
    if case.code == "ok":
        assert code == "ok", f"{name}: expected a clean analysis, got [{code}] {detail}"
        if case.warning:
            assert case.warning in detail.info["warning_codes"], detail.info["warnings"]
            strict_code, strict_detail = _outcome(case.path, AnalysisOptions(monte_carlo_samples=0, strict=True))
            assert strict_code == case.strict_code, strict_detail
            assert "--strict" in strict_detail.message
        return
    assert code == case.code, f"{name}: expected [{case.code}], got [{code}] {detail}"
    message = detail.message
    assert message.startswith(f"trial {case.path.name}") or message.startswith(f"trial {case.path.stem}"), message
    assert "\n" not in message and "Traceback" not in message
    assert case.phrase in message, message
    assert len(message) < 700


def test_swapped_sides_message_offers_the_marker_map_fix(corpus):
    """The fix offered is concrete: each right_ landmark takes the label of its left_ counterpart."""
    _, exc = _outcome(_case(corpus, "left_right_swapped").path)
    assert 'right_asis = "l.asis"' in exc.message and "--markers" in exc.message


def test_suggested_marker_map_fixes_the_swapped_trial(corpus, tmp_path):
    """Following the message (a markers.toml that swaps every left/right label) makes the trial analysable."""
    from hamstride.checks import swapped_marker_map
    from hamstride.landmarks import MarkerMap

    toml = "[landmarks]\n" + "".join(f'{k} = "{v}"\n' for k, v in swapped_marker_map(MarkerMap()).items())
    (tmp_path / "markers.toml").write_text(toml)
    result = analyse_trial(_case(corpus, "left_right_swapped").path, FAST, athlete=ATHLETE,
                           markers=tmp_path / "markers.toml")
    assert result.info["n_strides"]["left"] >= 1 and result.info["n_strides"]["right"] >= 1


def test_header_check_reads_layout_like_the_independent_reader(corpus):
    """Our own header/parameter walk agrees with the pure-Python `c3d` package on a valid file."""
    c3d = pytest.importorskip("c3d")
    import warnings

    path = _case(corpus, "valid").path
    layout = check_c3d_header(path)
    with open(path, "rb") as fh, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reader = c3d.Reader(fh)
        labels = [s.strip() for s in reader.get("POINT").get("LABELS").string_array]
        assert layout.n_points == reader.point_used
        assert layout.rate_hz == pytest.approx(reader.point_rate)
        assert layout.n_frames == reader.last_frame - reader.first_frame + 1
        assert list(layout.labels) == labels


def test_large_file_reads_and_passes_checks_quickly(tmp_path):
    """A 20,000-frame file (80 s at 250 Hz, 32 markers): validation and reading stay fast and memory-light."""
    from hamstride.checks import check_marker_trial

    labels, xyz = _base(duration_s=2.0)
    long = np.concatenate([xyz + np.array([8500.0 * 2.0 * k, 0.0, 0.0]) for k in range(40)])[:20000]
    path = write_c3d(tmp_path / "long_20000.c3d", labels, long, RATE)
    t0 = time.perf_counter()
    layout = check_c3d_header(path)
    trial = read_c3d(path)
    warnings = check_marker_trial(trial, labels)
    elapsed = time.perf_counter() - t0
    assert layout.n_frames == trial.n_frames == 20000 and warnings == ()
    assert elapsed < 5.0, elapsed


@pytest.mark.slow
def test_large_file_full_analysis(tmp_path):
    """The 20,000-frame trial through the whole pipeline (about a minute on 2 cores)."""
    labels, xyz = _base(duration_s=80.0)
    path = write_c3d(tmp_path / "long_20000.c3d", labels, xyz, RATE)
    result = analyse_trial(path, AnalysisOptions(), athlete=ATHLETE)
    assert result.info["n_frames"] == 20000
    assert min(result.info["n_strides"].values()) > 100


def test_squad_over_the_corpus_lists_every_file_with_its_code(corpus, tmp_path):
    """`hamstride squad` over the corpus: exit code 1, no traceback, every file in manifest.json with its code."""
    root = _case(corpus, "valid").path.parents[2]
    out = tmp_path / "out"
    # The corpus has no athletes.csv: its athlete folder is analysed only with --allow-unlisted (issue 15).
    proc = subprocess.run([sys.executable, "-m", "hamstride.cli", "squad", str(root), "--out", str(out), "--jobs",
                           "2", "--no-report", "--allow-unlisted"], capture_output=True, text=True, timeout=300,
                          env={**os.environ, "COLUMNS": "200"})
    assert proc.returncode == 1, proc.stderr[-2000:]
    assert "Traceback" not in proc.stdout + proc.stderr
    manifest = json.loads((out / "manifest.json").read_text())
    records = {Path(r["file"]).stem: r for r in manifest["inputs"]}
    assert set(records) == set(corpus)
    for name, case in corpus.items():
        rec = records[name]
        if case.code == "ok":
            assert rec["status"] == "ok", rec
        else:
            assert (rec["status"], rec["code"]) == ("failed", case.code), rec
            assert case.path.name in rec["reason"] or case.path.stem in rec["reason"]
            assert name in proc.stdout  # listed at the end of the run
    assert all(len(r["sha256"]) == 64 for r in manifest["inputs"])


# ------------------------------------------------------------------------------------------------ safe outputs

HOSTILE_ATHLETES = ("<script>alert(1)<\\script>", '"><img src=x onerror=alert(2)>')
HOSTILE_SESSION = "2026-01-05_<svg onload=alert(3)>"
HOSTILE_SUBJECT = "../../../pwn<script>alert(4)</script>"


def _assert_outputs_safe(base: Path, out: Path, inputs: Path) -> list[Path]:
    """Nothing written outside ``out`` (besides the inputs); no output path component carries markup or '..'."""
    stray = [p for p in base.rglob("*") if p.is_file() and out not in p.parents and inputs not in p.parents]
    assert stray == [], stray
    files = [p for p in out.rglob("*") if p.is_file()]
    for p in files:
        assert out.resolve() in p.resolve().parents
        for part in p.relative_to(out).parts:
            assert not set(part) & set('<>"\'\\') and not part.startswith(".."), p
    return files


def _assert_html_escaped(pages: list[Path], names: list[str]) -> None:
    import html as html_lib
    import re

    assert pages
    text = "\n".join(p.read_text(encoding="utf-8") for p in pages)
    for raw in ("<script>alert(1)", "<img src=x", "<svg onload", "<script>alert(4)"):
        assert raw not in text, raw
    for name in names:  # the names are shown (escaped), so the check above is not vacuous
        # jinja2's auto-escaping (markupsafe) writes quotes as &#34; / &#39; where html.escape writes &quot; / &#x27;
        from markupsafe import escape as markup_escape
        assert (html_lib.escape(name, quote=True) in text or html_lib.escape(name, quote=False) in text
                or str(markup_escape(name)) in text), name
    # Nothing is fetched from anywhere: no external src/href (common practice for self-contained reports).
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:|//|file:)""", text, flags=re.I)


@pytest.fixture(scope="module")
def hostile_squad(tmp_path_factory):
    from hamstride.batch import run_squad

    base = tmp_path_factory.mktemp("hostile")
    root = base / "squad"
    labels, xyz = _base(duration_s=1.2)
    for k, athlete in enumerate(HOSTILE_ATHLETES):
        session = HOSTILE_SESSION if k == 0 else "2026-01-06_normal"
        write_c3d(root / athlete / session / "sprint_01.c3d", labels, xyz, RATE,
                  subject={"name": HOSTILE_SUBJECT, "body_mass_kg": 75.0})
    import pandas as pd

    pd.DataFrame({"athlete": [*HOSTILE_ATHLETES, "../../outside", "..\\..\\outside2"],
                  "body_mass_kg": [75.0, 70.0, 60.0, 60.0], "height_m": [1.8, 1.75, 1.7, 1.7],
                  "sex": ["male", "female", "male", "male"], "involved_side": ["right", "none", "none", "none"],
                  "injury_date": ["2025-12-01", "", "", ""]}).to_csv(root / "athletes.csv", index=False)
    out = base / "out"
    run = run_squad(root, out, jobs=2, report=True, config=__import__("hamstride.batch", fromlist=["RunConfig"])
                    .RunConfig(analysis=FAST))
    return base, root, out, run


def test_hostile_folder_names_are_sanitised_and_escaped(hostile_squad):
    base, root, out, run = hostile_squad
    assert not run.failed, run.failed
    files = _assert_outputs_safe(base, out, root)
    pages = [p for p in files if p.suffix == ".html"]
    assert len([p for p in pages if p.parent.name == "athletes"]) == len(HOSTILE_ATHLETES)
    _assert_html_escaped(pages, list(HOSTILE_ATHLETES))
    # The names survive unchanged as data in the tables (they are data there, not markup or paths).
    strides = pd.read_csv(out / "strides.csv", dtype={"athlete": str, "session": str})
    assert set(strides["athlete"]) == set(HOSTILE_ATHLETES)
    assert HOSTILE_SESSION in set(strides["session"])


def test_dot_dot_names_from_tables_stay_inside_out(hostile_squad, tmp_path):
    """Athlete names with ../ (from athletes.csv or C3D subject metadata) reaching the report and timeline writers."""
    from hamstride.report import render_squad, render_timeline, safe_component

    _, _, out, run = hostile_squad
    first = HOSTILE_ATHLETES[0]
    renamed = {first: HOSTILE_SUBJECT}  # one athlete keeps the run short; the name holds both ../ and markup

    def rename(df):
        df = df.copy()
        if "athlete" in df.columns:
            df = df[df["athlete"] == first] if (df["athlete"] == first).any() else df
            df["athlete"] = df["athlete"].replace(renamed)
        return df

    curves = pd.read_csv(out / "curves.csv", dtype={"athlete": str, "session": str, "trial": str})
    target = tmp_path / "deep" / "out"
    render_squad(target, rename(run.strides), rename(curves), rename(run.flags), rename(run.summary),
                 rename(run.athletes), {"version": "test", "configuration": {}})
    timeline = rename(run.summary)
    render_timeline(target, timeline, "../../outside", None, {"configuration": {}})
    files = _assert_outputs_safe(tmp_path, target, out)
    assert any(p.name.startswith("timeline_") for p in files)
    for name in ("../../outside", HOSTILE_SUBJECT, "..", "../", "a/../../b", "C:\\x\\..\\y", "\x00nul", "CON"):
        part = safe_component(name)
        assert "/" not in part and "\\" not in part and not part.startswith(".") and ".." not in part, part
    _assert_html_escaped([p for p in files if p.suffix == ".html"], ["../../outside", HOSTILE_SUBJECT])
    assert not (tmp_path / "outside.html").exists() and not (tmp_path / "deep" / "outside.html").exists()


def test_timeline_cli_with_dot_dot_athlete_writes_nothing_outside(hostile_squad, tmp_path):
    _, root, out, _ = hostile_squad
    target = tmp_path / "t" / "out"
    proc = subprocess.run([sys.executable, "-m", "hamstride.cli", "timeline", str(root), "--athlete",
                           "../../outside", "--out", str(target), "--jobs", "1"], capture_output=True, text=True,
                          timeout=300)
    # "../../outside" is listed in athletes.csv but has no trials: a usage error (exit 2, issue 15), checked
    # before anything is written
    assert proc.returncode == 2 and "Traceback" not in proc.stdout + proc.stderr
    _assert_outputs_safe(tmp_path, target, root)


def test_strict_option_fails_trials_with_warnings(corpus, tmp_path):
    """`hamstride squad --strict`: trials that only had warnings fail with the warning's code; without it they pass."""
    import shutil

    from typer.testing import CliRunner

    from hamstride.cli import app

    root = tmp_path / "squad"
    session = root / "ST01" / "2026-01-05_s"
    session.mkdir(parents=True)
    for name in ("valid", "duplicate_other_label", "frames_all_missing"):
        shutil.copy(_case(corpus, name).path, session / f"{name}.c3d")
    (root / "athletes.csv").write_text("athlete,body_mass_kg,height_m,sex,involved_side,injury_date\n"
                                       "ST01,75,1.80,male,none,\n")
    config = tmp_path / "fast.toml"
    config.write_text("[analysis]\nmonte_carlo_samples = 0\n")
    runner = CliRunner()
    loose = runner.invoke(app, ["squad", str(root), "--out", str(tmp_path / "loose"), "--jobs", "2", "--no-report",
                                "--config", str(config)])
    assert loose.exit_code == 0, loose.output
    strict = runner.invoke(app, ["squad", str(root), "--out", str(tmp_path / "strict"), "--jobs", "2", "--no-report",
                                 "--config", str(config), "--strict"])
    assert strict.exit_code == 1, strict.output
    loose_manifest = json.loads((tmp_path / "loose" / "manifest.json").read_text())
    codes = {Path(r["file"]).stem: r.get("warning_codes") for r in loose_manifest["inputs"]}
    manifest = json.loads((tmp_path / "strict" / "manifest.json").read_text())
    outcome = {Path(r["file"]).stem: (r["status"], r.get("code")) for r in manifest["inputs"]}
    # Under --strict a trial fails with its first warning's code, and only a trial without warnings passes.
    assert outcome == {name: ("failed", c[0]) if c else ("ok", None) for name, c in codes.items()}
    assert outcome["duplicate_other_label"] == ("failed", "duplicate_labels")
    assert outcome["frames_all_missing"] == ("failed", "empty_frames")
    assert manifest["configuration"]["analysis"]["strict"] is True
    assert "duplicate_labels" in codes["duplicate_other_label"] and "empty_frames" in codes["frames_all_missing"]


@pytest.mark.parametrize("variant", [dict(vertical_axis="y", travel_sign=-1), dict(treadmill=True),
                                     dict(treadmill=True, vertical_axis="y", travel_sign=-1, units="m")])
def test_side_check_holds_in_every_lab_convention(variant, tmp_path):
    """Y-up labs, runs in the file's -x direction, treadmills, metres: correct labels pass the side check, swapped
    labels are caught (the check works in the internal lab frame, x along travel, y to the left)."""
    from hamstride.pipeline import trial_kinematics

    spec = SprintSpec(duration_s=1.2, **variant)
    labels, xyz, _ = simulate_sprint(spec)
    swapped = ["l" + lab[1:] if lab.startswith("r.") else "r" + lab[1:] if lab.startswith("l.") else lab
               for lab in labels]
    ok = write_c3d(tmp_path / "ok.c3d", labels, xyz, spec.rate_hz, units=spec.units)
    bad = write_c3d(tmp_path / "swapped.c3d", swapped, xyz, spec.rate_hz, units=spec.units)
    assert "sides_swapped" not in trial_kinematics(ok, FAST).warning_codes
    with pytest.raises(HamstrideError) as info:
        trial_kinematics(bad, FAST)
    assert info.value.code == "sides_swapped"


def test_broken_static_trial_is_named_in_the_sprint_failure(corpus):
    """A session's static calibration trial that cannot be read fails its sprints with the static file named."""
    case = _case(corpus, "valid")
    with pytest.raises(HamstrideError) as info:
        analyse_trial(case.path, FAST, athlete=ATHLETE, static_path=_case(corpus, "truncated_04").path)
    assert info.value.code == "truncated"
    assert info.value.message.startswith("trial valid:") and "static calibration trial truncated_04" in \
        info.value.message
