"""HTML pages from the content blocks through jinja2 templates with auto-escaping (``templates/``).

The pages are self-contained: pictures are PNG data URIs or inline SVG, the style and the one small script are
inline, and a Content-Security-Policy (with the script's hash) blocks everything else.
"""
from __future__ import annotations

import base64
import functools
import hashlib
from pathlib import Path

from .common import CAUTION
from .content import Page

__all__ = ["render_html"]

_TEMPLATES = Path(__file__).with_name("templates")


@functools.lru_cache(maxsize=1)
def _environment():
    import jinja2

    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(_TEMPLATES)), autoescape=True,
                             trim_blocks=True, lstrip_blocks=True, undefined=jinja2.StrictUndefined)
    env.filters["b64"] = lambda raster: base64.b64encode(raster.png).decode("ascii")
    return env


@functools.lru_cache(maxsize=1)
def _assets() -> tuple[str, str, str]:
    css = (_TEMPLATES / "page.css").read_text(encoding="utf-8")
    script = (_TEMPLATES / "page.js").read_text(encoding="utf-8")
    digest = base64.b64encode(hashlib.sha256(script.encode("utf-8")).digest()).decode("ascii")
    csp = (f"default-src 'none'; img-src data:; style-src 'unsafe-inline'; script-src 'sha256-{digest}'; "
           "base-uri 'none'; form-action 'none'")
    return css, script, csp


def render_html(page: Page) -> str:
    """The HTML text of one page."""
    css, script, csp = _assets()
    return _environment().get_template("page.html").render(page=page, css=css, script=script, csp=csp,
                                                           caution=CAUTION) + "\n"
