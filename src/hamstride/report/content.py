"""The content of a report page as frozen blocks: the one source of both the HTML page and the PDF.

A page is a title and a sequence of blocks (headings, text, figures, tables, lists, folded parts). The HTML comes
from these blocks through the auto-escaping jinja2 templates (:mod:`hamstride.report.html`), the PDF through
reportlab's layout engine (:mod:`hamstride.report.pdf`); neither adds or drops numbers of its own.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import ClassVar

from .common import cell_text, fmt, num
from .figures import Raster

__all__ = ["Cell", "number", "words", "Row", "Table", "Figure", "Heading", "Text", "Items", "Links",
           "SessionPicker", "Folded", "Page"]


@dataclass(frozen=True)
class Cell:
    """One table cell: its text, a numeric sort key (numbers are right-aligned), an optional link or picture."""

    text: str
    sort: str | None = None
    numeric: bool = False
    href: str | None = None
    wrap: bool = False
    title: str = ""
    picture: dict | None = field(default=None, compare=False)  # small SVG picture (HTML only; its text is shown in PDF)


def number(value: object, digits: int, text: str | None = None) -> Cell:
    """A numeric cell: formatted with ``digits`` decimals (en dash when missing) and a sort key."""
    x = num(value)
    return Cell(text if text is not None else fmt(x, digits), f"{x:.6g}" if math.isfinite(x) else "", True)


def words(value: object, *, wrap: bool = False, href: str | None = None, title: str = "") -> Cell:
    return Cell(cell_text(value), None, False, href, wrap, title)


@dataclass(frozen=True)
class Row:
    cells: tuple[Cell, ...]
    session: str | None = None  # the session picker shows or hides rows by this
    flagged: bool = False


@dataclass(frozen=True)
class Table:
    id: str
    headers: tuple[str, ...]
    rows: tuple[Row, ...]
    caption: str = ""
    titles: tuple[str, ...] = ()
    sortable: bool = True
    widths: tuple[float, ...] = ()  # relative column widths for the PDF (equal when empty)
    kind: ClassVar[str] = "table"


@dataclass(frozen=True)
class Figure:
    id: str
    title: str
    caption: str
    raster: Raster
    alt: str
    session: str | None = None  # with a session picker: the session it shows
    latest: bool = True  # False: an earlier session's picture, shown in HTML when that session is picked (not in PDF)
    kind: ClassVar[str] = "figure"


@dataclass(frozen=True)
class Heading:
    text: str
    id: str = ""
    kind: ClassVar[str] = "heading"


@dataclass(frozen=True)
class Text:
    """A paragraph; ``cls`` is one of "", "headline", "explain", "caution", "note"; ``strong`` is a bold lead-in."""

    text: str
    cls: str = ""
    id: str = ""
    strong: str = ""
    kind: ClassVar[str] = "text"


@dataclass(frozen=True)
class Items:
    """A list of (term, text) pairs: ``style`` "list" (term in bold) or "glossary" (definition list)."""

    items: tuple[tuple[str, str], ...]
    id: str = ""
    style: str = "list"
    kind: ClassVar[str] = "items"


@dataclass(frozen=True)
class Links:
    """Links to other files of the run (HTML: links; PDF: the file names, as the PDF travels alone)."""

    items: tuple[tuple[str, str], ...]
    id: str = ""
    lead: str = ""
    kind: ClassVar[str] = "links"


@dataclass(frozen=True)
class SessionPicker:
    """A choice of session that shows only that session's rows (HTML only; the PDF shows every session)."""

    sessions: tuple[str, ...]
    latest: str
    kind: ClassVar[str] = "picker"


@dataclass(frozen=True)
class Folded:
    """Blocks behind a one-line summary (HTML: a details element; PDF: the summary as a heading, then the blocks)."""

    summary: str
    blocks: tuple
    id: str = ""
    kind: ClassVar[str] = "folded"


@dataclass(frozen=True)
class Page:
    title: str
    heading: str
    blocks: tuple
    home: str | None = None
    pdf: bool = False
