"""The athlete PDF from the same content blocks as the HTML page, laid out by reportlab's platypus engine.

Paragraphs wrap to the frame, tables get column widths that fit the page, wrap their cells and break across pages
with the header row repeated, pictures are scaled to fit, and the caution is the footer of every page. The fonts
are the DejaVu faces that ship with matplotlib, so nothing needs installing beyond pip packages.

Pictures go in as the PNG's own compressed data (no decoding and compressing again): a PDF image stream with the
Flate filter and the PNG predictor reads a PNG's IDAT data as it is. Table cells whose text fits on one line are
plain strings, which platypus measures and draws without the paragraph machinery.

References
----------
reportlab user guide, chapter "Platypus" (flowables, ``Table(repeatRows=1)``, ``SimpleDocTemplate``).
ISO 32000-1:2008 (PDF 1.7), 7.4.4.4 "LZW and Flate predictor functions" (Table 8: Predictor 10-15 = PNG
predictors; DecodeParms Colors, BitsPerComponent, Columns) and 8.9.5 "Image dictionaries".
W3C PNG specification (2nd edition, 2003), 5.3 chunk layout, 11.2.2 IHDR, 11.2.4 IDAT.
"""
from __future__ import annotations

import functools
import hashlib
import io
import struct
from pathlib import Path
from urllib.parse import unquote
from xml.sax.saxutils import escape

from reportlab.platypus import Flowable

from ..atomic import atomic_write_bytes
from .common import CAUTION
from .content import Page

__all__ = ["para_text", "write_pdf"]

_FONT, _BOLD, _MONO = "hamstride-sans", "hamstride-sans-bold", "hamstride-mono"


@functools.lru_cache(maxsize=1)
def _fonts() -> tuple[str, str]:
    """Register DejaVu Sans (matplotlib's own font files) once; it covers ±, −, ≥, ÷ and the other signs we print."""
    from matplotlib import get_data_path
    from reportlab import rl_config
    from reportlab.pdfbase import pdfmetrics
    from reportlab.pdfbase.ttfonts import TTFont

    rl_config.useA85 = 0  # binary streams: the ASCII85 text encoding runs in pure Python and only adds size
    folder = Path(get_data_path()) / "fonts" / "ttf"
    pdfmetrics.registerFont(TTFont(_FONT, str(folder / "DejaVuSans.ttf")))
    pdfmetrics.registerFont(TTFont(_BOLD, str(folder / "DejaVuSans-Bold.ttf")))
    pdfmetrics.registerFontFamily(_FONT, normal=_FONT, bold=_BOLD, italic=_FONT, boldItalic=_BOLD)
    return _FONT, _BOLD


def para_text(value: object) -> str:
    """Text for a reportlab Paragraph: its mini-markup (<, >, &) escaped, so data can never add markup."""
    return escape(str(value))


@functools.lru_cache(maxsize=1)
def _styles() -> dict:
    from reportlab.lib import colors
    from reportlab.lib.styles import ParagraphStyle

    font, bold = _fonts()
    base = ParagraphStyle("body", fontName=font, fontSize=8.5, leading=11, splitLongWords=True)
    return {
        "body": base,
        "h1": ParagraphStyle("h1", parent=base, fontName=bold, fontSize=15, leading=19, spaceAfter=4),
        "h2": ParagraphStyle("h2", parent=base, fontName=bold, fontSize=11.5, leading=14, spaceBefore=9,
                             spaceAfter=3, keepWithNext=1),
        "explain": ParagraphStyle("explain", parent=base, textColor=colors.HexColor("#444444"), fontSize=8,
                                  leading=10, spaceAfter=3, keepWithNext=1),
        "headline": ParagraphStyle("headline", parent=base, fontSize=10, leading=13.5, borderPadding=5,
                                   backColor=colors.HexColor("#f6f6ef"), borderColor=colors.HexColor("#d9d9c8"),
                                   borderWidth=0.6, spaceBefore=6, spaceAfter=8),
        "caution": ParagraphStyle("caution", parent=base, borderPadding=5, backColor=colors.HexColor("#fbf1ef"),
                                  borderColor=colors.HexColor("#a8322d"), borderWidth=0.6, spaceBefore=5,
                                  spaceAfter=7),
        "note": ParagraphStyle("note", parent=base, borderPadding=4, backColor=colors.HexColor("#f3f5f8"),
                               spaceBefore=4, spaceAfter=6),
        "cell": ParagraphStyle("cell", parent=base, fontSize=7, leading=8.4),
        "cellnum": ParagraphStyle("cellnum", parent=base, fontSize=7, leading=8.4, alignment=2),
        "head": ParagraphStyle("head", parent=base, fontName=bold, fontSize=7, leading=8.4),
        "figtitle": ParagraphStyle("figtitle", parent=base, fontName=bold, fontSize=11.5, leading=14),
        "caption": ParagraphStyle("caption", parent=base, fontSize=7.8, leading=9.6, spaceAfter=6),
        "footer": ParagraphStyle("footer", parent=base, fontSize=6.8, leading=8.2,
                                 textColor=colors.HexColor("#333333")),
    }


def _paragraph(text: str, style: str, strong: str = ""):
    from reportlab.platypus import Paragraph

    lead = f"<b>{para_text(strong)}</b> " if strong else ""
    return Paragraph(lead + para_text(text), _styles()[style])


_CELL_PAD = 2.5  # points of padding left and right in every table cell


def _right_aligned(cells: list[tuple[int, int]], n_rows: int, n_cols: int) -> list[tuple]:
    """ALIGN commands for the plain numeric cells: one per column where the whole column is such cells."""
    by_column: dict[int, list[int]] = {}
    for i, j in cells:
        by_column.setdefault(j, []).append(i)
    commands = []
    for j, rows in by_column.items():
        if len(rows) == n_rows:
            commands.append(("ALIGN", (j, 1), (j, -1), "RIGHT"))
        else:
            commands += [("ALIGN", (j, i), (j, i), "RIGHT") for i in rows]
    return commands


def column_widths(headers, weights, width: float, word_width) -> list[float]:
    """Column widths in proportion to ``weights`` that add up to ``width``, each at least as wide as its header's
    longest word plus padding (``word_width(word)`` in points), so no header word is broken across lines; the
    columns that need no more than their share give up the difference in proportion to their weights."""
    floor = [max((word_width(w) for w in str(h).split()), default=0.0) + 2 * _CELL_PAD for h in headers]
    fixed: set[int] = set()
    while True:
        free = [j for j in range(len(headers)) if j not in fixed]
        room = width - sum(floor[j] for j in fixed)
        total = sum(weights[j] for j in free)
        widths = [floor[j] if j in fixed else room * weights[j] / total for j in range(len(headers))]
        short = {j for j in free if widths[j] < floor[j]}
        if not short or len(short) == len(free):
            return widths
        fixed |= short


def _table(block, width: float) -> list:
    """A wrapping table that fits ``width`` and repeats its header row on every page it spans."""
    from reportlab.lib import colors
    from reportlab.pdfbase.pdfmetrics import stringWidth
    from reportlab.platypus import Paragraph, Table, TableStyle

    styles = _styles()
    n = len(block.headers)
    weights = list(block.widths) if len(block.widths) == n else [1.0] * n
    head = styles["head"]
    widths = column_widths(block.headers, weights, width,
                           lambda word: stringWidth(word, head.fontName, head.fontSize))
    data = [[Paragraph(para_text(h), head) for h in block.headers]]
    cell, size = styles["cell"], styles["cell"].fontSize
    room = [w - 2 * _CELL_PAD for w in widths]
    right: list[tuple[int, int]] = []  # plain numeric cells, right-aligned as the "cellnum" paragraphs are
    for i, row in enumerate(block.rows, start=1):
        cells = []
        for j, c in enumerate(row.cells):
            text = str(c.text)
            if "\n" not in text and stringWidth(text, cell.fontName, size) <= room[j]:
                cells.append(text)  # fits on one line: no paragraph needed
                if c.numeric:
                    right.append((i, j))
            else:
                cells.append(Paragraph(para_text(text), styles["cellnum" if c.numeric else "cell"]))
        data.append(cells)
    if len(data) == 1:
        data.append([Paragraph("none", styles["cell"])] + [""] * (n - 1))
    table = Table(data, colWidths=widths, repeatRows=1, hAlign="LEFT")
    commands = [("GRID", (0, 0), (-1, -1), 0.4, colors.HexColor("#c8c8c8")),
                ("BACKGROUND", (0, 0), (-1, 0), colors.HexColor("#eef0f3")),
                ("VALIGN", (0, 0), (-1, -1), "TOP"),
                ("FONT", (0, 1), (-1, -1), cell.fontName, size, cell.leading),
                ("LEFTPADDING", (0, 0), (-1, -1), _CELL_PAD), ("RIGHTPADDING", (0, 0), (-1, -1), _CELL_PAD),
                ("TOPPADDING", (0, 0), (-1, -1), 1.5), ("BOTTOMPADDING", (0, 0), (-1, -1), 1.5)]
    commands += _right_aligned(right, len(data) - 1, n)
    for i, row in enumerate(block.rows, start=1):
        if row.flagged:
            commands.append(("LINEBEFORE", (0, i), (0, i), 3.0, colors.HexColor("#a8322d")))
    table.setStyle(TableStyle(commands))
    out = []
    if block.caption:
        out.append(_paragraph(block.caption, "explain"))
    out.append(table)
    return out


class _FigureFlowable(Flowable):
    """Title, picture and caption as one piece: the picture shrinks to the space left on the page, down to 60 % of
    its full-page size; below that the piece asks for its full size, so platypus moves it to the next page."""

    def __init__(self, block, width: float, height: float):
        super().__init__()
        self.title = _paragraph(block.title, "figtitle")
        self.caption = _paragraph(block.caption, "caption")
        self.png = block.raster.png
        self.w_pt, self.h_pt = block.raster.size_in[0] * 72.0, block.raster.size_in[1] * 72.0
        self.frame_h = height
        self.full = self.scale = min(1.0, width / self.w_pt)
        self.parts = (0.0, 0.0)

    def wrap(self, avail_w, avail_h):
        title_h = self.title.wrap(avail_w, avail_h)[1] + 4.0
        caption_h = self.caption.wrap(avail_w, avail_h)[1] + 6.0
        self.parts = (title_h, caption_h)
        full = min(self.full, avail_w / self.w_pt, (self.frame_h - title_h - caption_h) / self.h_pt)
        fit = min(full, (avail_h - title_h - caption_h) / self.h_pt)
        self.scale = fit if fit >= 0.6 * full else full
        return avail_w, title_h + self.h_pt * self.scale + caption_h

    def draw(self):
        title_h, caption_h = self.parts
        image_h = self.h_pt * self.scale
        self.caption.drawOn(self.canv, 0, 0)
        draw_png(self.canv, self.png, 0, caption_h, self.w_pt * self.scale, image_h)
        self.title.drawOn(self.canv, 0, caption_h + image_h + 4.0)


def _png_parts(png: bytes) -> tuple[int, int, bytes] | None:
    """Width, height and image data (the IDAT chunks joined) of an 8-bit RGB, non-interlaced PNG; else None."""
    if png[:8] != b"\x89PNG\r\n\x1a\n":
        return None
    pos, header, data = 8, None, []
    while pos + 8 <= len(png):
        length, kind = struct.unpack(">I4s", png[pos:pos + 8])
        chunk = png[pos + 8:pos + 8 + length]
        if kind == b"IHDR":
            header = struct.unpack(">IIBBBBB", chunk)
        elif kind == b"IDAT":
            data.append(chunk)
        elif kind == b"IEND":
            break
        pos += 12 + length
    if header is None or header[2:5] != (8, 2, 0) or header[6] != 0 or not data:
        return None
    return header[0], header[1], b"".join(data)


def _png_image_class():
    from reportlab.pdfbase.pdfdoc import PDFDictionary, PDFImageXObject, PDFName, PDFStream

    class PngImage(PDFImageXObject):
        """An image XObject holding a PNG's compressed data as it is (Flate filter, PNG predictor)."""

        def __init__(self, name: str, width: int, height: int, data: bytes):
            self.name, self.width, self.height, self.streamContent = name, width, height, data
            self.bitsPerComponent, self.colorSpace, self.mask = 8, "DeviceRGB", None
            self._filters = ("FlateDecode",)

        def format(self, document):
            stream = PDFStream(content=self.streamContent)
            d = stream.dictionary
            d["Type"], d["Subtype"] = PDFName("XObject"), PDFName("Image")
            d["Width"], d["Height"], d["BitsPerComponent"] = self.width, self.height, 8
            d["ColorSpace"] = PDFName("DeviceRGB")
            d["Filter"] = PDFName("FlateDecode")  # a single filter: name and parameter dictionary, not arrays
            d["DecodeParms"] = PDFDictionary({"Predictor": 15, "Colors": 3, "BitsPerComponent": 8,
                                              "Columns": self.width})
            d["Length"] = len(self.streamContent)
            return stream.format(document)

    return PngImage


_PngImage = functools.lru_cache(maxsize=1)(_png_image_class)


def draw_png(canvas, png: bytes, x: float, y: float, width: float, height: float) -> None:
    """Draw PNG bytes into the box (points) without decoding them; other PNG kinds go through reportlab's reader."""
    parts = _png_parts(png)
    if parts is None:
        from reportlab.lib.utils import ImageReader

        canvas.drawImage(ImageReader(io.BytesIO(png)), x, y, width=width, height=height)
        return
    name = "png-" + hashlib.md5(png, usedforsecurity=False).hexdigest()
    doc = canvas._doc  # reportlab's document: registering an image XObject once, as Canvas.drawImage does
    registered = doc.getXObjectName(name)
    if registered not in doc.idToObject:
        image = _PngImage()(name, *parts)
        doc.Reference(image, registered)
        doc.addForm(name, image)
    canvas.saveState()
    canvas.translate(x, y)
    canvas.scale(width, height)
    canvas.doForm(name)
    canvas.restoreState()


def _figure(block, width: float, height: float) -> list:
    return [_FigureFlowable(block, width, height)]


def _flowables(blocks, width: float, height: float) -> list:
    out = []
    for b in blocks:
        if b.kind == "heading":
            out.append(_paragraph(b.text, "h2"))
        elif b.kind == "text":
            out.append(_paragraph(b.text, b.cls if b.cls in _styles() else "body", b.strong))
        elif b.kind == "figure":
            if b.latest:  # earlier sessions' pictures are for the HTML session picker; the PDF is the latest's
                out += _figure(b, width, height)
        elif b.kind == "table":
            out += _table(b, width)
        elif b.kind == "items":
            out += [_paragraph(d, "body", f"{t}:" if t else "") for t, d in b.items]
        elif b.kind == "links":  # the PDF travels alone: name the files (as they sit beside the HTML page)
            names = ", ".join(f"{label} ({unquote(href)})" for label, href in b.items)
            out.append(_paragraph(f"{b.lead} {names}".strip(), "explain"))
        elif b.kind == "folded":
            out.append(_paragraph(b.summary, "h2"))
            out += _flowables(b.blocks, width, height)
        # "picker" is interactive: the PDF shows every session instead
    return out


def write_pdf(path: Path, page: Page) -> Path:
    """Lay ``page`` out on A4 landscape pages (caution and page number in every footer) and write it atomically."""
    from reportlab.lib.pagesizes import A4, landscape
    from reportlab.platypus import Paragraph, SimpleDocTemplate

    page_w, page_h = landscape(A4)
    margin, bottom = 28.0, 40.0
    styles = _styles()
    footer = Paragraph(f"<b>Caution.</b> {para_text(CAUTION)}", styles["footer"])

    def on_page(canvas, doc) -> None:
        canvas.saveState()
        w, h = footer.wrap(page_w - 2 * margin - 60, bottom)
        footer.drawOn(canvas, margin, max(6.0, (bottom - h) / 2))
        canvas.setFont(_FONT, 7)
        canvas.drawRightString(page_w - margin, max(6.0, (bottom - h) / 2), f"page {doc.page}")
        canvas.restoreState()

    buffer = io.BytesIO()
    doc = SimpleDocTemplate(buffer, pagesize=(page_w, page_h), leftMargin=margin, rightMargin=margin,
                            topMargin=margin, bottomMargin=bottom, title=page.title, subject=CAUTION,
                            author="hamstride", creator="hamstride")
    story = [_paragraph(page.heading, "h1")] + _flowables(page.blocks, doc.width, doc.height)
    doc.build(story, onFirstPage=on_page, onLaterPages=on_page)
    return atomic_write_bytes(path, buffer.getvalue())


