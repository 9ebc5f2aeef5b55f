"""Squad, athlete and timeline reports rendered from the exported tables.

This stage draws; it computes no biomechanics. It reads the tables of the export contract (strides, curves, flags,
summary, athletes) and writes self-contained HTML pages (jinja2 templates with auto-escaping, pictures embedded,
nothing fetched from anywhere), one PDF per athlete laid out by reportlab from the same content, and the
return-to-run timeline of every athlete with two or more sessions.

Modules: :mod:`.common` (words, names, small table helpers), :mod:`.figures` (matplotlib pictures),
:mod:`.content` (the page blocks), :mod:`.pages` (what each page says), :mod:`.web` (HTML), :mod:`.pdf` (PDF),
:mod:`.render` (writing the files).
"""
from __future__ import annotations

from .common import (BODY_MASS_MISSING, CAUTION, FLAG_EXPLANATIONS, GLOSSARY, athlete_files, safe_component,
                     session_sort_key)


def __getattr__(name: str):
    """The renderers load matplotlib, jinja2 and reportlab only when first used (a tables-only run never does)."""
    if name in ("render_squad", "render_timeline", "TABLE_FILES"):
        from . import render

        return getattr(render, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__all__ = ["render_squad", "render_timeline", "athlete_files", "safe_component", "session_sort_key", "CAUTION",
           "GLOSSARY", "FLAG_EXPLANATIONS", "BODY_MASS_MISSING", "TABLE_FILES"]
