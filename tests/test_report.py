"""Tests of the report stage: files, escaping, path safety, the caution, the flags table, and a headless browser.

The tables here are invented (fictional athletes) — enough to exercise rendering, not biomechanics.
"""
from __future__ import annotations

import html
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from hamstride import report
from hamstride.report import CAUTION, render_squad, render_timeline, safe_component
from hamstride.report.common import csv_cell, mpl_text

MUSCLES = ("biceps_femoris_long", "semitendinosus", "semimembranosus", "biceps_femoris_short")
SIDES = ("left", "right")
EVIL = "<script>alert(1)</script>"
TRAVERSAL = "../../outside"
HOSTILE = TRAVERSAL + EVIL  # one invented athlete folder name that tries both path traversal and markup


def _tables(athletes=("ZZ99",), sessions=("2026-03-02_week0", "2026-01-15_pre"), n_strides=3, no_mass=()):
    """Invented strides/curves/flags/summary/athletes tables in the export-contract shape."""
    rng = np.random.default_rng(7)
    pct = np.arange(101.0)
    stride_rows, curve_parts, summary_rows, flag_rows = [], [], [], []
    for a_i, athlete in enumerate(athletes):
        for s_i, session in enumerate(sessions):
            for side in SIDES:
                for m_i, muscle in enumerate(MUSCLES):
                    amp = 8.0 + m_i - (1.2 if side == "left" else 0.0) + 0.3 * a_i
                    peaks = []
                    for stride in range(n_strides):
                        centre = 86.0 + rng.normal(0, 1.5)
                        strain = amp * np.exp(-((pct - centre) / 13.0) ** 2) - 2.0 + rng.normal(0, 0.1, pct.size)
                        fibre = 0.95 + 0.02 * strain
                        velocity = np.gradient(fibre, pct) * 100 / 0.44
                        force = 0.0 if athlete in no_mass else 1.0
                        force_n = force * 1800 * np.exp(-((pct - 82) / 8.0) ** 2)
                        power = -force_n * velocity * 0.1
                        curve_parts.append(pd.DataFrame({
                            "athlete": athlete, "session": session, "trial": "trial01", "side": side,
                            "stride": stride, "muscle": muscle, "pct": pct,
                            "hip_flexion_deg": 30 + 40 * np.sin(2 * np.pi * (pct - 55) / 100),
                            "hip_adduction_deg": 3 * np.sin(2 * np.pi * pct / 100),
                            "knee_flexion_deg": 70 - 55 * np.cos(2 * np.pi * (pct - 10) / 100),
                            "length_m": 0.45 * (1 + strain / 100), "strain_pct": strain,
                            "fibre_length_lopt": fibre, "velocity_lopt_per_s": velocity,
                            "force_n": force_n if athlete not in no_mass else np.nan,
                            "power_w": power if athlete not in no_mass else np.nan,
                            "hip_moment_nm_per_kg": np.nan, "knee_moment_nm_per_kg": np.nan}))
                        peak = float(strain.max())
                        peaks.append(peak)
                        stride_rows.append({
                            "athlete": athlete, "session": session, "trial": "trial01", "side": side,
                            "stride": stride, "muscle": muscle, "foot_strike_s": 0.45 * stride,
                            "toe_off_s": 0.45 * stride + 0.1, "next_foot_strike_s": 0.45 * (stride + 1),
                            "stride_time_s": 0.45, "toe_off_pct": 22.0, "late_swing_start_pct": 74.0,
                            "speed_m_s": 8.5 + 0.1 * s_i, "peak_hip_flexion_deg": 70.0, "peak_knee_flexion_deg": 125.0,
                            "peak_strain_pct": peak, "peak_strain_time_pct": float(pct[strain.argmax()]),
                            "peak_strain_p5_pct": peak - 1.5, "peak_strain_p95_pct": peak + 1.5,
                            "peak_fibre_length_lopt": float(fibre.max()),
                            "peak_fibre_length_lopt_p5": float(fibre.max()) - 0.05,
                            "peak_fibre_length_lopt_p95": float(fibre.max()) + 0.05,
                            "peak_lengthening_velocity_lopt_per_s": float(velocity.max()),
                            "peak_force_n": np.nan if athlete in no_mass else 1800.0,
                            "negative_work_j": np.nan if athlete in no_mass else 20.0 + m_i,
                            "positive_work_j": np.nan if athlete in no_mass else 10.0})
                    mean = float(np.mean(peaks))
                    summary_rows.append({
                        "athlete": athlete, "session": session, "side": side, "muscle": muscle,
                        "n_strides": n_strides, "speed_m_s": 8.5, "peak_strain_pct_mean": mean,
                        "peak_strain_pct_sd": float(np.std(peaks, ddof=1)), "peak_strain_pct_cv_pct": 4.0,
                        "peak_fibre_length_lopt_mean": 1.1, "peak_fibre_length_lopt_sd": 0.02,
                        "peak_fibre_length_lopt_cv_pct": 2.0, "peak_lengthening_velocity_lopt_per_s_mean": 3.0,
                        "peak_lengthening_velocity_lopt_per_s_sd": 0.2,
                        "peak_lengthening_velocity_lopt_per_s_cv_pct": 6.0,
                        "negative_work_j_mean": np.nan if athlete in no_mass else 20.0 + m_i,
                        "negative_work_j_sd": np.nan if athlete in no_mass else 1.0,
                        "negative_work_j_cv_pct": np.nan, "peak_force_n_mean": np.nan if athlete in no_mass else 1800,
                        "peak_force_n_sd": 50.0, "peak_force_n_cv_pct": 3.0,
                        "peak_strain_symmetry_index_pct": np.nan, "peak_fibre_length_symmetry_index_pct": np.nan,
                        "negative_work_symmetry_index_pct": np.nan, "peak_strain_lsi_pct": 86.0,
                        "negative_work_lsi_pct": 92.0})
        flag_rows.append({"athlete": athlete, "session": sessions[0], "side": "left", "muscle": "biceps_femoris_long",
                          "flag": "side_asymmetry", "value": 14.0, "threshold": 10.0,
                          "message": f"left BFlh stretches 14 % less than right for {athlete}"})
        flag_rows.append({"athlete": athlete, "session": sessions[0], "side": np.nan, "muscle": np.nan,
                          "flag": "speed_low", "value": 7.7, "threshold": 7.9,
                          "message": "running speed below 90 % of this athlete's best"})
    athletes_df = pd.DataFrame({"athlete": list(athletes),
                                "body_mass_kg": [np.nan if a in no_mass else 75.0 for a in athletes],
                                "height_m": 1.8, "sex": "M", "involved_side": "left", "injury_date": "2025-12-01"})
    return (pd.DataFrame(stride_rows), pd.concat(curve_parts, ignore_index=True), pd.DataFrame(flag_rows),
            pd.DataFrame(summary_rows), athletes_df)


RUN_INFO = {"software_version": "0.1.0-test", "tendon_slack_note": "tendon slack lengths assumed from the model",
            "filter_note": "Butterworth 2nd order, dual pass, cutoff by residual analysis",
            "thresholds": {"side_asymmetry_pct": 10.0},
            "failed_trials": [{"trial": "ZZ99/2026-03-02_week0/<b>bad</b>.c3d", "reason": "no heel marker"}]}


@pytest.fixture(scope="module")
def squad(tmp_path_factory):
    root = tmp_path_factory.mktemp("squad")
    out = root / "out"
    tables = _tables(athletes=("ZZ99", HOSTILE), no_mass=(HOSTILE,))
    paths = render_squad(out, *tables, dict(RUN_INFO))
    return root, out, paths, None  # rendering time is printed by benchmarks/run.py, not asserted here


# --- safe_component -------------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["../../etc/passwd", "..", ".", "a/b", "a\\b", "x\x00y", "tab\there", "\n",
                                  "", "CON", "nul.txt", ".hidden", "é-ü", EVIL, "a" * 300, "trailing."])
def test_safe_component_has_no_separators_dots_or_control_chars(name):
    out = safe_component(name)
    assert out and "/" not in out and "\\" not in out and ".." not in out and not out.startswith(".")
    assert not re.search(r"[\x00-\x1f\x7f]", out)
    assert re.fullmatch(r"[A-Za-z0-9_.-]{1,80}", out)
    assert out.split(".")[0].lower() not in {"con", "nul", "prn", "aux"}


def test_safe_component_is_stable_unique_and_keeps_plain_names():
    assert safe_component("ZZ99") == "ZZ99"
    assert safe_component("2026-03-02_week0") == "2026-03-02_week0"
    names = ["a/b", "a_b", "a\\b", "a b", "a:b", "a?b", "../a_b", "a..b", "a.b"]
    outs = [safe_component(n) for n in names]
    assert len(set(outs)) == len(names)  # distinct names -> distinct files
    assert outs == [safe_component(n) for n in names]  # stable


def test_case_insensitive_collisions_get_distinct_files():
    files = report.athlete_files(["AB1", "ab1", "CD2"])
    assert len({f.casefold() for f in files.values()}) == 3
    assert files["CD2"] == "CD2"


# --- squad rendering ------------------------------------------------------------------------------------------


def test_render_squad_writes_every_file_inside_out_dir(squad):
    root, out, paths, _ = squad
    assert [p.name for p in root.iterdir()] == ["out"]  # nothing escaped the output folder
    assert out / "index.html" in paths
    assert len([p for p in paths if p.suffix == ".pdf"]) == 2
    assert len([p for p in paths if p.suffix == ".html"]) == 3
    for p in paths:
        assert p.exists() and p.stat().st_size > 0
        assert p.resolve().is_relative_to(out.resolve())
    assert not list(out.rglob("*.partial"))  # atomic writes leave no temporaries
    assert (out / "athletes" / "ZZ99.html").exists()


def _pages(out: Path) -> list[Path]:
    return [out / "index.html", *sorted((out / "athletes").glob("*.html"))]


def test_names_from_data_are_escaped_everywhere(squad):
    _, out, _, _ = squad
    for page in _pages(out):
        text = page.read_text(encoding="utf-8")
        assert "alert(1)</script>" not in text
        assert text.count("<script") == 1  # only our own inline script
        assert "<b>bad</b>" not in text
    index = (out / "index.html").read_text(encoding="utf-8")
    assert html.escape(HOSTILE) in index
    assert "&lt;b&gt;bad&lt;/b&gt;.c3d" in index and "no heel marker" in index


def test_pages_fetch_nothing(squad):
    _, out, _, _ = squad
    for page in _pages(out):
        text = page.read_text(encoding="utf-8")
        for src in re.findall(r'\ssrc="([^"]*)"', text):
            assert src.startswith("data:image/png;base64,")
        for href in re.findall(r'\shref="([^"]*)"', text):
            assert "://" not in href and not href.startswith("/") and not href.lower().startswith("javascript")
        csp = re.search(r'http-equiv="Content-Security-Policy" content="([^"]*)"', text).group(1)
        assert html.unescape(csp).startswith("default-src 'none'")


def test_links_from_index_reach_athlete_pages(squad):
    _, out, _, _ = squad
    index = (out / "index.html").read_text(encoding="utf-8")
    links = re.findall(r'href="(athletes/[^"]+\.html)"', index)
    assert len(set(links)) == 2
    for link in links:
        assert (out / html.unescape(link)).exists()


def test_caution_flags_and_notes_on_every_page(squad):
    _, out, _, _ = squad
    for page in _pages(out):
        text = page.read_text(encoding="utf-8")
        assert CAUTION in html.unescape(text)
        assert 'id="flags"' in text
        assert "side_asymmetry" in text
        assert "tendon slack lengths assumed from the model" in text
        assert "active force only between about 0.5 and 1.5" in text
        assert "Kenneally-Dabrowski" in text
    athlete = (out / "athletes" / "ZZ99.html").read_text(encoding="utf-8")
    assert "left BFlh stretches 14 % less than right for ZZ99" in html.unescape(athlete)
    # latest session: stretch, force/power, joints; plus the earlier session's stretch for the session picker
    assert athlete.count("<img ") == 4 and athlete.count('data-figure-session="2026-01-15_pre"') == 1
    assert 'id="summary"' in athlete and 'id="strides"' in athlete and 'id="uncertainty"' in athlete


def test_missing_values_show_as_dashes_not_nan(squad):
    _, out, _, _ = squad
    for page in _pages(out):
        text = page.read_text(encoding="utf-8")
        assert ">nan<" not in text.lower() and "speed_low" in text


def test_missing_body_mass_is_explained(squad):
    _, out, _, _ = squad
    page = (out / "athletes" / f"{safe_component(HOSTILE)}.html").read_text(encoding="utf-8")
    assert html.escape(report.BODY_MASS_MISSING) in page
    assert 'id="fig-force"' not in page
    ok = (out / "athletes" / "ZZ99.html").read_text(encoding="utf-8")
    assert report.BODY_MASS_MISSING not in ok and 'id="fig-force"' in ok


def _pdf_pages_and_info(path: Path) -> tuple[int, bytes]:
    data = path.read_bytes()
    assert data.startswith(b"%PDF")
    return len(re.findall(rb"/Type\s*/Page\b", data)), data


def test_pdf_has_caution_text_page_and_plots(squad):
    # the layout engine changed (reportlab platypus instead of pages drawn by matplotlib): the caution is checked
    # on every page's text and in the document information, with pdfplumber, instead of in raw bytes
    pdfplumber = pytest.importorskip("pdfplumber")
    _, out, _, _ = squad
    n_pages, _ = _pdf_pages_and_info(out / "athletes" / "ZZ99.pdf")
    assert n_pages >= 4  # text, three plots, tables
    with pdfplumber.open(out / "athletes" / "ZZ99.pdf") as pdf:
        assert pdf.metadata.get("Subject") == CAUTION
        assert len(pdf.images_on_pages if hasattr(pdf, "images_on_pages") else
                   [im for p in pdf.pages for im in p.images]) == 3
        for page in pdf.pages:
            assert " ".join(CAUTION.split()) in " ".join((page.extract_text() or "").split())


@pytest.mark.slow
def test_process_pool_gives_the_same_athlete_pages(tmp_path):
    tables = _tables(athletes=("ZZ98", "ZZ97"), sessions=("2026-03-02_week0",), n_strides=2)
    serial = render_squad(tmp_path / "serial", *tables, dict(RUN_INFO))
    pooled = render_squad(tmp_path / "pooled", *tables, dict(RUN_INFO, report_jobs=2))
    assert [p.relative_to(tmp_path / "serial") for p in serial] == [p.relative_to(tmp_path / "pooled") for p in pooled]
    for a, b in zip(serial, pooled):
        if a.suffix == ".html" and a.name != "index.html":  # the index carries a time stamp
            assert a.read_bytes() == b.read_bytes()


def test_session_order_uses_date_prefix():
    names = ["2026-03-02_week0", "notes", "2025-12-20_base", "2026-01-15_pre"]
    assert sorted(names, key=report.session_sort_key) == ["2025-12-20_base", "2026-01-15_pre", "2026-03-02_week0",
                                                         "notes"]


def test_matplotlib_text_cannot_switch_on_mathtext():
    assert mpl_text("$x^2$") == r"\$x^2\$"


def test_csv_cells_cannot_hold_formulas():
    assert csv_cell("=HYPERLINK(1)") == "'=HYPERLINK(1)"
    assert csv_cell("ZZ99") == "ZZ99"
    assert csv_cell(-1.5) == -1.5


# --- timeline -------------------------------------------------------------------------------------------------


def _timeline_table(athlete: str) -> pd.DataFrame:
    rows = []
    sessions = ["2026-03-02_week0", "2026-01-15_pre", "2026-04-01_week4"]
    for session in sessions:
        date = pd.Timestamp(session[:10])
        for side in SIDES:
            for m_i, muscle in enumerate(MUSCLES):
                rows.append({"athlete": athlete, "session": session, "date": date,
                             "days_since_injury": (date - pd.Timestamp("2025-12-01")).days, "side": side,
                             "muscle": muscle, "speed_m_s": 8.0 + 0.2 * sessions.index(session),
                             "peak_strain_pct_mean": 8.0 + m_i - (1.0 if side == "left" else 0.0),
                             "peak_fibre_length_lopt_mean": 1.1, "negative_work_j_mean": 20.0 + m_i,
                             "lsi_pct": 85.0 + 3 * sessions.index(session)})
    return pd.DataFrame(rows)


def test_render_timeline_writes_png_html_csv_in_date_order(tmp_path):
    out = tmp_path / "tl"
    paths = render_timeline(out, _timeline_table(EVIL), EVIL, {"body_mass_kg": 75, "injury_date": "2025-12-01"},
                            RUN_INFO)
    assert sorted(p.suffix for p in paths) == [".csv", ".html", ".png"]
    for p in paths:
        assert p.exists() and p.resolve().is_relative_to(out.resolve())
    assert [p.name for p in tmp_path.iterdir()] == ["tl"]
    png = next(p for p in paths if p.suffix == ".png").read_bytes()
    assert png.startswith(b"\x89PNG")
    page = next(p for p in paths if p.suffix == ".html").read_text(encoding="utf-8")
    assert "alert(1)</script>" not in page and html.escape(EVIL) in page
    assert CAUTION in html.unescape(page) and "90 %" in page and "days since injury" in page
    table = pd.read_csv(next(p for p in paths if p.suffix == ".csv"))
    assert list(dict.fromkeys(table["session"])) == ["2026-01-15_pre", "2026-03-02_week0", "2026-04-01_week4"]
    assert table["athlete"].iloc[0] == EVIL  # text kept as data, not altered (no leading formula character)


def test_timeline_without_injury_date_or_involved_side(tmp_path):
    table = _timeline_table("ZZ99").drop(columns=["days_since_injury"]).assign(lsi_pct=np.nan)
    paths = render_timeline(tmp_path, table, "ZZ99", None, {"configuration": {}})
    page = next(p for p in paths if p.suffix == ".html").read_text(encoding="utf-8")
    assert "days since injury" not in page and CAUTION in html.unescape(page)
    assert next(p for p in paths if p.suffix == ".png").stat().st_size > 10_000


# --- headless browser -----------------------------------------------------------------------------------------


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


def _dump_dom(page: Path, profile: Path) -> str:
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           "--disable-dev-shm-usage", f"--user-data-dir={profile}", "--virtual-time-budget=3000", "--dump-dom",
           page.resolve().as_uri()]
    result = subprocess.run(cmd, capture_output=True, text=True, timeout=90)
    return result.stdout


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed (.ci/run installs it)")
def test_pages_load_in_headless_chromium_with_every_image(squad, tmp_path):
    _, out, _, _ = squad
    for page in (out / "index.html", out / "athletes" / "ZZ99.html"):
        dom = _dump_dom(page, tmp_path / "profile")
        assert 'data-images-ok="true"' in dom, page
        n_images = int(re.search(r'data-images="(\d+)"', dom).group(1))
        assert n_images == page.read_text(encoding="utf-8").count("<img ")
        assert 'id="flags"' in dom
        assert "alert(1)</script>" not in dom


def test_force_and_work_bands_are_drawn_when_present_and_skipped_when_absent(tmp_path):
    strides, curves, flags, summary, athletes = _tables(athletes=("ZZ96",), sessions=("2026-03-02_week0",))
    # issue 14's band columns (strides: _p5/_p95; summary: their means) — invented values
    strides = strides.assign(peak_force_n_p5=1700.0, peak_force_n_p95=1900.0, negative_work_j_p5=18.0,
                             negative_work_j_p95=24.0)
    summary = summary.assign(peak_force_n_p5_mean=1700.0, peak_force_n_p95_mean=1900.0,
                             negative_work_j_p5_mean=18.0, negative_work_j_p95_mean=24.0)
    render_squad(tmp_path / "with", strides, curves, flags, summary, athletes, dict(RUN_INFO))
    page = html.unescape((tmp_path / "with" / "athletes" / "ZZ96.html").read_text(encoding="utf-8"))
    assert "peak force L model range (N)" in page and "negative work R model range (J)" in page
    assert "1700 to 1900" in page and "18.0 to 24.0" in page
    assert "bars its model range (5–95 %)" in page
    plain = _tables(athletes=("ZZ96",), sessions=("2026-03-02_week0",))
    render_squad(tmp_path / "without", *plain, dict(RUN_INFO))
    page = html.unescape((tmp_path / "without" / "athletes" / "ZZ96.html").read_text(encoding="utf-8"))
    assert "model range (N)" not in page and "bars its model range" not in page


def test_progress_is_reported_once_per_athlete(tmp_path):
    steps = []
    tables = _tables(athletes=("ZZ95", "ZZ94"), sessions=("2026-03-02_week0",), n_strides=2)
    render_squad(tmp_path, *tables, dict(RUN_INFO), progress=lambda done, total: steps.append((done, total)))
    assert steps == [(0, 2), (1, 2), (2, 2)]


def test_kept_figure_layouts_draw_each_picture_as_a_full_drawing_of_it_alone(monkeypatch):
    """Figures keep their fixed part (axes, titles, time axis, legend) between pictures and draw only each picture's
    own artists over a copy of its pixels. A picture drawn after another athlete's must match matplotlib's full
    drawing of that picture on a new figure: nothing left over from the first athlete, its own value ranges."""
    import io

    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image

    from hamstride.report import figures

    strides, curves, *_ = _tables(athletes=("ZZ01", "ZZ02"), sessions=("2026-01-15_pre",))
    second = curves["athlete"] == "ZZ02"
    for col in ("strain_pct", "fibre_length_lopt", "velocity_lopt_per_s", "force_n", "power_w", "knee_flexion_deg"):
        curves.loc[second, col] = curves.loc[second, col] * 1.7 + 3.0  # other value ranges than the first athlete
    strides.loc[strides["athlete"] == "ZZ02", "late_swing_start_pct"] = 61.0

    def one(athlete):
        return curves[curves["athlete"] == athlete], strides[strides["athlete"] == athlete]

    kinds = {"stretch": lambda c, s, a: figures.stretch_figure(c, s, MUSCLES, a),
             "compact": lambda c, s, a: figures.stretch_figure(c, s, MUSCLES, a, compact=True),
             "force": lambda c, s, a: figures.force_figure(c, s, MUSCLES, a),
             "joints": lambda c, s, a: figures.joint_figure(c, s, a)}
    timelines = {"ZZ01": _timeline_table("ZZ01"), "ZZ02": _timeline_table("ZZ02").iloc[8:]}  # two sessions, not three
    timelines["ZZ02"] = timelines["ZZ02"].assign(speed_m_s=timelines["ZZ02"]["speed_m_s"] + 1.3,
                                                 negative_work_j_mean=timelines["ZZ02"]["negative_work_j_mean"] * 3)

    def timeline(c, s, athlete):
        tl = timelines[athlete]
        sessions = sorted(tl["session"].unique())
        return figures.timeline_figure(tl, athlete, sessions, sessions, MUSCLES, ["lsi_pct"], "session date")

    kinds["timeline"] = timeline
    for name, make in kinds.items():
        monkeypatch.setattr(figures, "_LAYOUTS", {})
        monkeypatch.setattr(figures, "_LAYOUT_OF_FIGURE", {})
        fig = make(*one("ZZ02"), "ZZ02")
        canvas = FigureCanvasAgg(fig)
        fig.set_dpi(figures.RASTER_DPI)
        canvas.draw()  # matplotlib's full drawing of the second athlete's picture alone
        alone = np.asarray(canvas.buffer_rgba())[..., :3].astype(int)
        monkeypatch.setattr(figures, "_LAYOUTS", {})
        monkeypatch.setattr(figures, "_LAYOUT_OF_FIGURE", {})
        figures.raster(make(*one("ZZ01"), "ZZ01"))
        kept = make(*one("ZZ02"), "ZZ02")
        assert len(figures._LAYOUTS) == 1  # the second picture reused the first one's layout
        drawn = np.asarray(Image.open(io.BytesIO(figures.raster(kept).png)).convert("RGB")).astype(int)
        assert drawn.shape == alone.shape
        differ = np.abs(drawn - alone).max(axis=2) > 40
        # only antialiased frame corners may differ (the frame is drawn again over the picture's lower artists)
        assert differ.mean() < 5e-4, (name, int(differ.sum()))
