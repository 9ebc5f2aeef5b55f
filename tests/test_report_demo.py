"""Acceptance tests of the reports on the invented demo squad (issue 16): every PDF keeps its text on the page and
carries every flag of the athlete's latest session, links resolve (also in headless Chromium), the short head's
stretch symmetry index is never printed where the summary leaves it empty, and the squad run writes the
timelines, the per-athlete curves files and one report progress step per athlete.

Outside references: page geometry and text come from pdfplumber (pdfminer.six), an independent PDF reader; the
links are followed by Chromium; the palette is checked against the published hex values of Tol (2021).
"""
from __future__ import annotations

import html
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote, urlparse

import numpy as np
import pandas as pd
import pytest

from hamstride import style
from hamstride.batch import run_squad
from hamstride.report import CAUTION
from hamstride.synth import write_demo_squad

pdfplumber = pytest.importorskip("pdfplumber")


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    root = tmp_path_factory.mktemp("demo")
    write_demo_squad(root / "squad")
    steps: list[tuple[int, int]] = []
    run = run_squad(root / "squad", root / "out", jobs=2, report_progress=lambda d, t: steps.append((d, t)))
    return root / "out", run, steps


def _squash(text: str) -> str:
    """Text without any white space (line breaks inside a wrapped table cell differ from the message's spaces)."""
    return re.sub(r"\s+", "", text)


class _Tables(HTMLParser):
    """Rows of every table by id, and every href, from an HTML page (standard-library parser)."""

    def __init__(self):
        super().__init__()
        self.tables: dict[str, list[list[str]]] = {}
        self.headers: dict[str, list[str]] = {}
        self.hrefs: list[str] = []
        self._table: str | None = None
        self._cell: list[str] | None = None
        self._row: list[str] | None = None
        self._in_head = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "a" and "href" in attrs:
            self.hrefs.append(attrs["href"])
        if tag == "table":
            self._table = attrs.get("id")
            self.tables[self._table], self.headers[self._table] = [], []
        elif tag == "thead":
            self._in_head = True
        elif tag == "tbody":
            self._in_head = False
        elif tag == "tr" and self._table:
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None and self._row is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None and self._table:
            (self.headers if self._in_head else self.tables)[self._table].extend(
                [self._row] if not self._in_head else self._row)
            self._row = None
        elif tag == "table":
            self._table = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _parse(page: Path) -> _Tables:
    parser = _Tables()
    parser.feed(page.read_text(encoding="utf-8"))
    return parser


def test_every_pdf_keeps_its_text_on_the_page_and_every_latest_flag(demo):
    out, run, _ = demo
    pdfs = sorted((out / "athletes").glob("*.pdf"))
    assert len(pdfs) == run.athletes["athlete"].nunique() == 6
    flags = run.flags
    for path in pdfs:
        athlete = path.stem
        with pdfplumber.open(path) as pdf:
            text = []
            for page in pdf.pages:
                for ch in page.chars:  # every glyph box inside the page (0.5 pt tolerance for rounding)
                    assert -0.5 <= ch["x0"] and ch["x1"] <= page.width + 0.5, (athlete, page.page_number, ch["text"])
                    assert -0.5 <= ch["top"] and ch["bottom"] <= page.height + 0.5, (athlete, page.page_number)
                page_text = page.extract_text() or ""
                assert _squash(CAUTION) in _squash(page_text), (athlete, page.page_number)
                text.append(page_text)
        whole = _squash("\n".join(text))
        mine = flags[flags["athlete"] == athlete]
        latest = max(run.summary.loc[run.summary["athlete"] == athlete, "session"])
        for message in mine.loc[mine["session"] == latest, "message"]:
            assert _squash(message) in whole, (athlete, message)
        for message in mine["message"]:  # earlier sessions' flags are there too (after the latest's)
            assert _squash(message) in whole, (athlete, message)
        assert _squash("Terms used") in whole and _squash("gait cycle (%)") in whole


def test_long_tables_break_across_pages_with_their_header_repeated(demo):
    out, run, _ = demo
    pages, n_rows = [], 0
    with pdfplumber.open(out / "athletes" / "RB12.pdf") as pdf:
        for page in pdf.pages:
            for table in page.extract_tables():
                head = [" ".join((c or "").split()) for c in table[0]]
                if "peak knee flexion (deg)" in head:  # a header cell of the per-stride table, on each page
                    pages.append(page.page_number)
                    assert "stride" in head, head  # whole: the column is as wide as its header word
                    n_rows += len(table) - 1
    strides = run.strides[run.strides["athlete"] == "RB12"]
    assert n_rows == len(strides.drop_duplicates(["session", "trial", "side", "stride"]))  # every stride, once
    assert len(pages) >= 2 and pages == list(range(pages[0], pages[0] + len(pages)))


def test_short_head_stretch_symmetry_is_never_printed_where_the_summary_leaves_it_empty(demo):
    out, run, _ = demo
    summary = run.summary
    bfsh = summary[summary["muscle"] == "biceps_femoris_short"]
    assert len(bfsh) and bfsh["peak_strain_symmetry_index_pct"].isna().all()  # negative strain: SI undefined
    for page in sorted((out / "athletes").glob("*.html")):
        parsed = _parse(page)
        headers = parsed.headers["summary"]
        si = headers.index("stretch SI (%)")
        rows = [r for r in parsed.tables["summary"] if r[1] == "BFsh"]
        assert rows, page.name
        for row in rows:
            assert row[si] == "–", (page.name, row)
        for row in parsed.tables["summary"]:  # a printed SI is the summary's own value
            if row[si] != "–":
                value = summary[(summary["athlete"] == page.stem) & (summary["session"] == row[0])
                                & (summary["muscle"].map(style.MUSCLE_SHORT) == row[1])][
                    "peak_strain_symmetry_index_pct"].dropna()
                assert float(row[si]) == pytest.approx(float(value.iloc[0]), abs=0.051)
    with pdfplumber.open(out / "athletes" / "RB12.pdf") as pdf:
        for page in pdf.pages:
            for table in page.extract_tables():
                head = [(c or "").replace("\n", " ") for c in table[0]]
                if "stretch SI (%)" in head:
                    for row in table[1:]:
                        if row[1] == "BFsh":
                            assert row[head.index("stretch SI (%)")] == "–"


def test_cv_and_strides_read_as_numbers_not_fractions(demo):
    out, _, _ = demo
    parsed = _parse(out / "athletes" / "KT07.html")
    assert "stretch CV L (%)" in parsed.headers["summary"] and "strides R" in parsed.headers["summary"]
    for row in parsed.tables["summary"]:
        assert not any(re.fullmatch(r"\d+/\d+", cell) for cell in row), row


def test_squad_writes_timelines_curves_files_and_one_progress_step_per_athlete(demo):
    out, run, steps = demo
    assert steps == [(k, 6) for k in range(7)]
    multi = [a for a, g in run.summary.groupby("athlete") if g["session"].nunique() >= 2]
    assert multi == ["RB12"]
    assert sorted(p.name for p in out.glob("timeline_*")) == ["timeline_RB12.csv", "timeline_RB12.html",
                                                              "timeline_RB12.png"]
    curves = pd.read_csv(out / "curves.csv", dtype={"athlete": str, "session": str, "trial": str})
    total = 0
    for athlete in sorted(run.athletes["athlete"]):
        mine = pd.read_csv(out / "athletes" / f"{athlete}_curves.csv",
                           dtype={"athlete": str, "session": str, "trial": str})
        assert list(mine.columns) == list(curves.columns)
        assert set(mine["athlete"]) == {athlete}
        pd.testing.assert_frame_equal(
            mine.reset_index(drop=True),
            curves[curves["athlete"] == athlete].reset_index(drop=True))
        total += len(mine)
    assert total == len(curves)
    timeline = pd.read_csv(out / "timeline_RB12.csv")
    text = (out / "timeline_RB12.csv").read_text()
    assert not re.search(r"\d\.\d{5,}", text)  # rounded, not full float precision
    assert timeline["days_since_injury"].tolist() == sorted(timeline["days_since_injury"].tolist())


def test_overview_puts_the_latest_session_first_and_folds_earlier_flags(demo):
    out, run, _ = demo
    page = (out / "index.html").read_text(encoding="utf-8")
    parsed = _parse(out / "index.html")
    assert len(parsed.tables["athletes"]) == 6
    n_earlier = int((run.flags["athlete"] == "RB12").sum())
    assert f"RB12: {n_earlier} flags in 2 earlier sessions, none in the latest" in html.unescape(page)
    assert re.search(r"<details[^>]*><summary>RB12: ", page)
    assert page.count("<svg") == 6  # one small picture per athlete
    for name in ("strides.csv", "curves.csv", "summary.csv", "flags.csv", "manifest.json"):
        assert f'href="{name}"' in page
    assert "1 sessions" not in page and "1 flags" not in page
    rb12 = (out / "athletes" / "RB12.html").read_text(encoding="utf-8")
    assert rb12.index('id="headline"') < rb12.index('id="fig-timeline"') < rb12.index('id="fig-stretch"') < \
        rb12.index('id="flags"') < rb12.index('id="summary"') < rb12.index('id="glossary"')
    assert "no flags" in rb12[rb12.index('id="headline"'):rb12.index('id="fig-timeline"')]
    kt07 = (out / "athletes" / "KT07.html").read_text(encoding="utf-8")
    assert "1 session:" in kt07 and "fig-timeline" not in kt07 and 'id="session-picker"' not in kt07
    assert 'id="session-picker"' in rb12


def _links_resolve(page: Path, hrefs: list[str], ids: set[str]) -> None:
    for href in hrefs:
        parsed = urlparse(href)
        assert not parsed.scheme and not parsed.netloc, href
        if parsed.path:
            assert (page.parent / unquote(parsed.path)).resolve().exists(), (page.name, href)
        if parsed.fragment:
            assert parsed.fragment in ids, (page.name, href)


def test_links_resolve_on_every_page(demo):
    out, _, _ = demo
    pages = [out / "index.html", out / "timeline_RB12.html", *sorted((out / "athletes").glob("*.html"))]
    for page in pages:
        text = page.read_text(encoding="utf-8")
        hrefs = [html.unescape(h) for h in re.findall(r'href="([^"]*)"', text)]
        assert hrefs, page.name
        _links_resolve(page, hrefs, set(re.findall(r'id="([^"]*)"', text)))


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed (CI installs it)")
def test_chromium_loads_index_and_athlete_page_and_their_links_resolve(demo, tmp_path):
    out, _, _ = demo
    for page in (out / "index.html", out / "athletes" / "RB12.html"):
        cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               "--disable-dev-shm-usage", f"--user-data-dir={tmp_path / 'profile'}", "--virtual-time-budget=3000",
               "--dump-dom", page.resolve().as_uri()]
        dom = subprocess.run(cmd, capture_output=True, text=True, timeout=120).stdout
        assert 'data-images-ok="true"' in dom, page  # our script ran (CSP hash matches) and every image decoded
        parser = _Tables()
        parser.feed(dom)
        assert parser.hrefs
        _links_resolve(page, [html.unescape(h) for h in parser.hrefs], set(re.findall(r'id="([^"]*)"', dom)))


# --- style --------------------------------------------------------------------------------------------------


def _luminance(hex_colour: str) -> float:
    """Relative luminance (WCAG 2.x definition, sRGB): what a grey-scale print keeps of a colour."""
    rgb = np.array([int(hex_colour[i:i + 2], 16) for i in (1, 3, 5)]) / 255.0
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    return float(lin @ [0.2126, 0.7152, 0.0722])


def test_one_muscle_palette_apart_from_the_sides():
    # Tol (2021) "muted" qualitative scheme, hex values as published (SRON/EPS/TN/09-002 issue 3.2)
    tol_muted = {"#332288", "#88CCEE", "#44AA99", "#117733", "#999933", "#DDCC77", "#CC6677", "#882255", "#AA4499"}
    muscles = {c.upper() for c in style.MUSCLE_COLOUR.values()}
    assert muscles <= tol_muted and len(muscles) == 4
    assert not muscles & {c.upper() for c in style.SIDE_COLOUR.values()}
    assert len(set(style.MUSCLE_MARKER.values())) == 4 and len(set(style.MUSCLE_LINESTYLE.values())) == 4
    # left and right differ in line style, marker and grey level (a grey-scale print keeps them apart)
    assert style.SIDE_LINESTYLE["left"] != style.SIDE_LINESTYLE["right"]
    assert style.SIDE_MARKER["left"] != style.SIDE_MARKER["right"]
    assert abs(_luminance(style.SIDE_COLOUR["left"]) - _luminance(style.SIDE_COLOUR["right"])) > 0.2  # common practice
    from hamstride import muscles as muscle_module
    assert not hasattr(muscle_module, "PALETTE")  # the muscles plot takes its colours from hamstride.style


def test_figure_titles_use_the_muscle_palette(demo):
    from hamstride.report.figures import stretch_figure

    out, _, _ = demo
    curves = pd.read_csv(out / "athletes" / "KT07_curves.csv", dtype={"athlete": str, "session": str, "trial": str})
    strides = pd.read_csv(out / "strides.csv", dtype={"athlete": str, "session": str, "trial": str})
    strides = strides[strides["athlete"] == "KT07"]
    order = list(style.MUSCLE_ORDER)
    fig = stretch_figure(curves, strides, order, "KT07")
    titles = [ax.title for ax in fig.axes if ax.get_title()]
    from matplotlib.colors import to_hex
    assert [to_hex(t.get_color()).upper() for t in titles] == [style.MUSCLE_COLOUR[m].upper() for m in order]
    side_colours = {to_hex(line.get_color()).upper() for ax in fig.axes for line in ax.get_lines()
                    if line.get_linestyle() in ("-", "--") and len(line.get_xdata()) > 50}
    assert side_colours == {c.upper() for c in style.SIDE_COLOUR.values()}


def test_sorting_hint_is_on_screen_only(demo):
    # "Click a column heading to sort" is an instruction for the HTML page; printed on paper it cannot be followed
    out, _, _ = demo
    assert "Click a column heading to sort." in (out / "athletes" / "RB12.html").read_text(encoding="utf-8")
    with pdfplumber.open(out / "athletes" / "RB12.pdf") as pdf:
        text = " ".join(" ".join((page.extract_text() or "").split()) for page in pdf.pages)
    assert "to sort" not in text and "Stretch per session" in text
