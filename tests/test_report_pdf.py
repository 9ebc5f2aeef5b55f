"""The PDF's pictures and table cells, checked with readers that share no code with the writer.

Outside references: Pillow decodes the PNG, pdfminer.six (through pdfplumber) decodes the PDF image stream with its
own Flate and PNG-predictor code (ISO 32000-1:2008, 7.4.4.4), and pdfplumber extracts the table text.
"""
from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

pdfplumber = pytest.importorskip("pdfplumber")


def _png(rgb: np.ndarray, mode: str = "RGB") -> bytes:
    buffer = io.BytesIO()
    Image.fromarray(rgb).convert(mode).save(buffer, format="PNG", compress_level=1)
    return buffer.getvalue()


def _pdf_with(png: bytes, size: tuple[int, int]) -> bytes:
    from reportlab.pdfgen.canvas import Canvas

    from hamstride.report.pdf import draw_png

    buffer = io.BytesIO()
    canvas = Canvas(buffer, pagesize=(size[0] + 20, size[1] + 20))
    draw_png(canvas, png, 10, 10, *size)
    draw_png(canvas, png, 10, 10, size[0] / 2, size[1] / 2)  # the same picture twice is stored once
    canvas.showPage()
    canvas.save()
    return buffer.getvalue()


def _test_picture() -> np.ndarray:
    """Smooth gradients, flat areas and noise, so the PNG encoder uses all its row filters (None, Sub, Up, Average,
    Paeth) and the predictor has to undo each of them."""
    rng = np.random.default_rng(3)
    h, w = 37, 53  # odd sizes: no row-length coincidences
    y, x = np.mgrid[0:h, 0:w]
    rgb = np.stack([(4 * x) % 256, (7 * y) % 256, (x * y) % 256], axis=-1).astype(np.uint8)
    rgb[10:20] = 255
    rgb[25:] = rng.integers(0, 256, size=(h - 25, w, 3), dtype=np.uint8)
    return rgb


def test_png_goes_into_the_pdf_undecoded_and_reads_back_pixel_for_pixel():
    from hamstride.report.pdf import _png_parts

    rgb = _test_picture()
    png = _png(rgb)
    width, height, data = _png_parts(png)
    assert (width, height) == (53, 37)
    pdf = _pdf_with(png, (width, height))
    assert data in pdf  # the PNG's compressed data as it is, not decoded and compressed again
    assert pdf.count(b"/Subtype /Image") == 1
    with pdfplumber.open(io.BytesIO(pdf)) as doc:
        (image,) = {id(im["stream"]): im for im in doc.pages[0].images}.values() or [None]
        decoded = image["stream"].get_data()  # pdfminer applies FlateDecode and the PNG predictor itself
    expected = np.asarray(Image.open(io.BytesIO(png)).convert("RGB"))  # Pillow's decoding
    assert np.array_equal(np.frombuffer(decoded, dtype=np.uint8).reshape(expected.shape), expected)
    assert np.array_equal(expected, rgb)


def test_other_png_kinds_fall_back_to_reportlab_reader():
    from hamstride.report.pdf import _png_parts

    rgba = _png(_test_picture(), "RGBA")
    assert _png_parts(rgba) is None  # 4 channels: not the predictor layout we write
    assert _png_parts(b"not a png") is None
    pdf = _pdf_with(rgba, (53, 37))
    with pdfplumber.open(io.BytesIO(pdf)) as doc:
        assert len(doc.pages[0].images) == 2


def test_table_cells_keep_their_text_whether_plain_or_wrapped(tmp_path):
    from hamstride.report.content import Cell, Page, Row, Table
    from hamstride.report.pdf import write_pdf

    long = "a flag message long enough that it has to wrap inside its narrow column of the table " * 2
    rows = tuple(Row((Cell(f"row {i}"), Cell(f"{i * 1.5:.1f}", numeric=True), Cell(long if i == 2 else "short")))
                 for i in range(4))
    page = Page(title="t", heading="Invented athlete ZZ01",
                blocks=(Table("t", ("name", "value", "message"), rows, widths=(1.0, 1.0, 1.0)),))
    path = write_pdf(tmp_path / "t.pdf", page)
    with pdfplumber.open(path) as doc:
        text = " ".join(p.extract_text() for p in doc.pages)
        words = doc.pages[0].extract_words()
    for i in range(4):
        assert f"row {i}" in text and f"{i * 1.5:.1f}" in text
    assert " ".join(long.split()) in " ".join(text.split())
    # numbers are right-aligned in their column, as the wrapped numeric cells are: their right edges agree
    rights = [w["x1"] for w in words if w["text"] in {f"{i * 1.5:.1f}" for i in range(4)}]
    assert len(rights) == 4 and max(rights) - min(rights) < 0.5
    lefts = [w["x0"] for w in words if w["text"] == "row"]
    assert len(lefts) == 4 and max(lefts) - min(lefts) < 0.5


def test_pdf_image_dictionary_is_one_a_strict_reader_accepts(tmp_path):
    """A single filter is written as a name with a parameter dictionary (ISO 32000-1, 7.3.8.2: DecodeParms is an
    array only beside an array of filters). Poppler, which holds to that, renders the picture as Pillow decodes it
    (an array-of-one Filter with a dictionary DecodeParms made it skip the predictor: a black, striped picture)."""
    import shutil
    import subprocess

    rgb = np.zeros((40, 60, 3), dtype=np.uint8)
    rgb[:] = (240, 200, 40)
    rgb[:, 30:] = (30, 90, 200)
    pdf = _pdf_with(_png(rgb), (60, 40))
    with pdfplumber.open(io.BytesIO(pdf)) as doc:
        attrs = doc.pages[0].images[0]["stream"].attrs
    if isinstance(attrs["Filter"], list):
        assert isinstance(attrs.get("DecodeParms"), list) and len(attrs["DecodeParms"]) == len(attrs["Filter"])
    else:
        assert isinstance(attrs["DecodeParms"], dict) and attrs["DecodeParms"]["Predictor"] == 15
    if shutil.which("pdftoppm") is None:
        pytest.skip("poppler's pdftoppm is not installed")
    (tmp_path / "p.pdf").write_bytes(pdf)
    subprocess.run(["pdftoppm", "-r", "72", "-png", "-singlefile", str(tmp_path / "p.pdf"), str(tmp_path / "p")],
                   check=True)
    page = np.asarray(Image.open(tmp_path / "p.png").convert("RGB")).astype(int)
    # the picture sits 10 pt from the bottom-left corner at 1 pt per pixel (the half-size copy covers its lower
    # half); look inside each colour of its upper half, off the edges
    top = page.shape[0] - 10 - 40
    assert np.abs(page[top + 3:top + 17, 15:35] - (240, 200, 40)).max() <= 3
    assert np.abs(page[top + 3:top + 17, 45:65] - (30, 90, 200)).max() <= 3


def test_pdf_table_columns_are_wide_enough_for_every_header_word():
    # the strides table's "stride" header was broken as "strid / e": a column narrower than a header word
    from hamstride.report.pdf import column_widths

    headers = ["side", "stride", "peak strain (%)", "lengthening velocity (l_opt/s)", "x"]
    weights = [1.0, 0.4, 1.0, 3.0, 1.0]

    def word_width(word):  # 4 points per character, a stand-in for a font's metrics
        return 4.0 * len(word)

    widths = column_widths(headers, weights, 300.0, word_width)
    assert abs(sum(widths) - 300.0) < 1e-9
    for header, w in zip(headers, widths):
        assert w >= max(word_width(x) for x in header.split()) + 2 * 2.5 - 1e-9, header
    # columns with room to spare keep their proportions to each other
    assert abs(widths[0] / widths[2] - 1.0) < 1e-9 and abs(widths[3] / widths[0] - 3.0) < 1e-9
