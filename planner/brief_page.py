"""The briefing's page: the kinds of block its content is made of, and their rendering.

Part of the briefing stage (:mod:`planner.brief`). A block is a plain dict with a
``kind`` (``para``, ``subhead``, ``table``, ``figure``, ``list``; the sign-off's
``signed`` and ``signoff`` are built where their content is); each kind has one
partial under ``planner/templates/blocks``. :func:`render_html` renders the content
through the Jinja2 templates (one base page, autoescaping on) with every figure
embedded as a data URI, and :func:`write_pdf` prints that same HTML with WeasyPrint,
so the two files cannot say different things; :func:`pdf_unavailable` says in one
line what to install where WeasyPrint cannot run. Page layout (A4, footers, what may
not break across a page or a line) is the templates' CSS: this module only marks
which tables are short enough to keep on one page, which numbers must not break at
their minus sign, and how wide each figure is shown.
"""

from __future__ import annotations

import base64
import functools
import re
from pathlib import Path
from typing import TYPE_CHECKING

from planner import style
from planner.errors import RunFolderError

if TYPE_CHECKING:
    from planner.brief import BriefInputs


# ----------------------------------------------------------------------------- blocks


def para(text: str, *, small: bool = False, alert: bool = False) -> dict:
    """A paragraph: ``small`` for notes, ``alert`` for what a reviewer must not miss."""
    return {"kind": "para", "text": text, "small": small, "alert": alert}


def subhead(text: str) -> dict:
    """A heading inside a section."""
    return {"kind": "subhead", "text": text}


#: Tables with at most this many rows are kept on one page when they fit on one.
KEEP_ROWS = 24


def table(headers, rows, *, numeric=(), small: bool = False, narrow: bool = False, alerts=()) -> dict:
    """A table of text cells; ``numeric`` columns align right, ``alerts`` are (row, column) cells to mark."""
    rows = [[str(v) for v in r] for r in rows]
    return {"kind": "table", "headers": [str(h) for h in headers], "rows": rows, "numeric": tuple(numeric),
            "keep": len(rows) <= KEEP_ROWS, "small": small, "narrow": narrow, "alerts": {tuple(a) for a in alerts}}


def figure(file: str, alt: str, caption: str) -> dict:
    """A figure of the run folder (embedded when rendered), with its alternative text and caption."""
    return {"kind": "figure", "file": file, "alt": alt, "caption": caption}


def bullets(items, *, keep: bool = False) -> dict:
    """A list of items; ``keep`` holds it on one page."""
    return {"kind": "list", "items": [str(i) for i in items], "keep": keep}


# ----------------------------------------------------------------------------- HTML and PDF

#: Figures are never shown larger than this many pixels per inch, so the PDF carries
#: them at print resolution (the figures are drawn at ``style.FIGURE_DPI``).
PRINT_PPI = 300
#: The page's text width and the tallest a figure may be drawn (A4 less margins).
TEXT_WIDTH_MM = 184.0
FIGURE_MAX_HEIGHT_MM = 150.0

#: What to install when WeasyPrint cannot find its system libraries.
PDF_LIBRARIES = ("Pango >= 1.44 (Debian/Ubuntu: apt-get install libpango-1.0-0 libpangoft2-1.0-0 "
                 "libharfbuzz-subset0)")

#: Colours of the page furniture; the colours of meaning come from ``planner.style``.
_COLOURS = {"text": style.TEXT, "hazard": style.HAZARD, "disagree": style.DISAGREE, "rule": "#cccccc",
            "muted": "#555555", "header_fill": "#f1efe9", "notice_fill": "#fbeee9", "banner_fill": "#f3ebf8",
            "glance_fill": "#f6f5f1"}


def _figure_path(folder: Path, name: str) -> Path:
    path = Path(folder) / name
    if not path.is_file():
        raise RunFolderError(f"{folder}: figure {name} for the briefing is missing")
    return path


#: Numbers a browser must not break at their minus sign (``1.2e-4``, ``1-3.0e-6``, ``-180.3``);
#: not inside words or dates (``2026-12-03T06:35:29Z`` is left as it is).
_NUMBER = re.compile(r"(?<![\w.-])-?\d[\d.,]*(?:e-\d+)?(?:-\d[\d.]*e-\d+)?")


def _keep_numbers_whole(value):
    """Escaped text whose numbers with a minus sign (``1.2e-4``, ``-180.3``) never break."""
    from markupsafe import Markup, escape

    text, out, last = str(value), [], 0
    for m in _NUMBER.finditer(text):
        if "-" in m.group(0):
            out += [escape(text[last:m.start()]), Markup('<span class="nw">%s</span>') % m.group(0)]
            last = m.end()
    out.append(escape(text[last:]))
    return Markup("").join(out)


def _css_string(text: str):
    """``text`` as a CSS string literal, safe inside a ``<style>`` element (a newline starts a line)."""
    from markupsafe import Markup

    safe = "".join(ch if ch.isalnum() and ch.isascii() or ch in " .,-_()" else f"\\{ord(ch):x} " for ch in text)
    return Markup(f'"{safe}"')


@functools.cache
def _templates():
    """The briefing's Jinja2 templates (package data under ``planner/templates``), autoescaping on."""
    from jinja2 import Environment, PackageLoader, StrictUndefined

    env = Environment(loader=PackageLoader("planner", "templates"), autoescape=True, undefined=StrictUndefined,
                      trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True)
    env.filters["numbers"] = _keep_numbers_whole
    env.filters["css_string"] = _css_string
    return env


def _figure_width_mm(path: Path) -> float:
    """Display width of a figure, millimetres.

    The text width, less if that would show it below ``PRINT_PPI`` or taller than
    ``FIGURE_MAX_HEIGHT_MM``.
    """
    from PIL import Image

    with Image.open(path) as image:
        w_px, h_px = image.size
    return min(TEXT_WIDTH_MM, 25.4 * w_px / PRINT_PPI, FIGURE_MAX_HEIGHT_MM * w_px / h_px)


def footer_text(content: dict) -> str:
    """What every printed page carries at its foot: the run, the site file's full hash, the version."""
    return (f"veerwise {content['version']} briefing - run {content['run_id']} - {content['site']} - for "
            f"simulation and review only\nsite file sha256 {content['site_sha256']}")


def render_html(content: dict, inputs: BriefInputs) -> str:
    """The briefing page, with every figure embedded as a data URI (no script, no links).

    Parameters
    ----------
    content : dict
        From :func:`brief_content`.
    inputs : BriefInputs
        The same inputs; only ``folder`` (where the figures are) is read.

    Returns
    -------
    str
        A complete HTML document, styled for A4 printing (``@page`` rules, footers).
    """
    folder = Path(inputs.folder)

    def figure_src(name: str) -> str:
        data = base64.b64encode(_figure_path(folder, name).read_bytes()).decode("ascii")
        return f"data:image/png;base64,{data}"

    sections = []
    for section in content["sections"]:
        blocks = [dict(b, width_mm=_figure_width_mm(_figure_path(folder, b["file"]))) if b["kind"] == "figure"
                  else b for b in section["blocks"]]
        sections.append(dict(section, blocks=blocks))
    return _templates().get_template("base.html.j2").render(
        c=dict(content, sections=sections), colour=_COLOURS, footer=footer_text(content), figure_src=figure_src)


def _weasyprint():
    """The WeasyPrint module, or None when its system libraries (Pango) cannot be loaded."""
    try:
        import weasyprint
    except (ImportError, OSError):
        return None
    return weasyprint


def pdf_unavailable() -> str | None:
    """Why this machine cannot write ``brief.pdf`` (one line naming what to install), or None."""
    if _weasyprint() is not None:
        return None
    from importlib.util import find_spec

    if find_spec("weasyprint") is None:
        return "brief.pdf not written: the Python package weasyprint is not installed (pip install weasyprint)"
    return f"brief.pdf not written: WeasyPrint cannot load its system libraries; install {PDF_LIBRARIES}"


def write_pdf(path, page: str) -> Path:
    """Print the briefing's HTML ``page`` to the PDF ``path`` with WeasyPrint.

    Parameters
    ----------
    path : path-like
        The PDF to write.
    page : str
        From :func:`render_html`; self-contained, so nothing is fetched.

    Returns
    -------
    Path
    """
    weasyprint = _weasyprint()
    if weasyprint is None:
        raise RunFolderError(pdf_unavailable())
    # the page embeds everything it shows: nothing but data URIs is ever fetched
    fetcher = weasyprint.URLFetcher(allowed_protocols={"data"})
    weasyprint.HTML(string=page, url_fetcher=fetcher).write_pdf(Path(path))
    return Path(path)
