"""The briefing: its content, the self-contained HTML page rendered from the templates,
the PDF WeasyPrint prints from it (read back with pypdf and poppler), and the page as a
real browser prints it (headless Chromium)."""

from __future__ import annotations

import base64
import dataclasses
import difflib
import fnmatch
import hashlib
import html
import json
import os
import re
import shutil
import signal
import subprocess
import warnings
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image as mpimg
import pytest
from conftest import plan_small_site
from numpy.testing import assert_allclose
from pypdf import PdfReader

from planner.brief import NOTICE, BriefInputs, brief_content, write_brief
from planner.brief_page import PRINT_PPI, footer_text, render_html
from planner.brief_sections import CAUTIONS, SIGNOFF_FIELDS
from planner.errors import RunFolderError
from planner.notation import probability_range
from planner.risk import RiskRow, format_prob
from planner.runfolder import run_identity
from planner.runload import load_run, rebuild, run_routes

#: A plan small enough for a test (a few seconds) that still exercises every section.
PLAN_ARGS = ("--cell", "2", "--episodes", "2000", "--training-runs", "2", "--rollouts", "300", "--root-seed", "5")
FIGURES = ("routes.png", "sensitivity.png", "riskmap.png", "learning.png")
#: Chromium gets this long to print the page; a hung browser fails the test, never the run.
CHROMIUM_TIMEOUT_S = 120
CHROMIUM_NAMES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
POPPLER = ("pdftotext", "pdfinfo", "pdfimages")
#: A4 in PostScript points: 210 mm x 297 mm at 72 / 25.4 points per mm (ISO 216).
A4_PT = (595.28, 841.89)
#: Pages the small site's briefing may take: its content fits on 6-9 A4 pages (the
#: unconverged small plan carries three banners: two verdicts and the seeds'); more
#: means a table or figure breaks badly, fewer means content went missing.
PAGES = range(5, 10)
#: A page with less text than this and no figure is a layout accident (a stray line).
MIN_PAGE_CHARS = 200


# ----------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def planned(tmp_path_factory):
    """The small test site planned by ``veerwise plan``: (run folder, summary printed)."""
    _, out, result = plan_small_site(tmp_path_factory.mktemp("brief"), *PLAN_ARGS)
    assert result.exit_code == 0, result.output
    return out, result.output


@pytest.fixture(scope="module")
def inputs(planned):
    """The briefing's inputs read back from the run folder (as ``veerwise brief`` does)."""
    run = load_run(planned[0])
    site, grid, model = rebuild(run)
    rows = [RiskRow.from_dict(r) for r in json.loads((run.folder / "risk.json").read_text())]
    return BriefInputs(folder=run.folder, site=site, grid=grid, routes=run_routes(run, site, grid, model),
                       risk_rows=rows, settings=run.settings, manifest=run.manifest, run_name=run.folder.name)


@pytest.fixture(scope="module")
def summary(planned):
    """Route length and P(incident) of each policy as the ``plan`` summary printed them."""
    found = dict((m[0], (m[1], m[2])) for m in re.findall(
        r"^(cautious|shortest)\s+([\d.]+) m \(.*\n\s+P\(incident\) (.+?) at noise", planned[1], re.M))
    assert set(found) == {"cautious", "shortest"}, planned[1]
    return found


class _Page(HTMLParser):
    """Tags with their attributes, and the visible text with block boundaries kept."""

    INLINE = {"span", "b", "i", "em", "strong"}

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags, self.parts, self._skip = [], [], 0
        self.feed(text)
        self.close()
        self.text = " ".join("".join(self.parts).split())

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag in ("style", "script", "title"):
            self._skip += 1
        elif tag not in self.INLINE:
            self.parts.append(" \n ")

    def handle_endtag(self, tag):
        if tag in ("style", "script", "title"):
            self._skip -= 1
        elif tag not in self.INLINE:
            self.parts.append(" \n ")

    def handle_data(self, data):
        if not self._skip:
            self.parts.append(data)


def _has_number(text: str, figure: str) -> bool:
    """Whether ``figure`` appears in ``text`` as a whole number (not inside a longer one)."""
    return re.search(rf"(?<![\d.]){re.escape(figure)}(?![\d])", text) is not None


def _png_size(data: bytes) -> tuple[int, int]:
    # width and height are the first two fields of the IHDR chunk, right after the
    # 8-byte signature and the chunk's length and type (W3C, "PNG Specification",
    # 2nd ed., sections 5.2 and 11.2.2)
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")


def _page_html(inputs) -> str:
    return render_html(brief_content(inputs), inputs)


def _with_convergence(inputs, cautious: bool, shortest: bool):
    manifest = json.loads(json.dumps(inputs.manifest))
    for name, ok in (("cautious", cautious), ("shortest", shortest)):
        result = manifest["results"][name]
        result["converged"] = ok
        result["message"] = ("converged: " if ok else "NOT CONVERGED: ") + result["message"].split(": ", 1)[1]
    return dataclasses.replace(inputs, manifest=manifest)


# ----------------------------------------------------------------------------- content and HTML


def test_rendered_again_from_the_run_folder_is_identical(planned, inputs):
    # ``plan`` wrote the page from results in memory; this one comes from the files
    assert _page_html(inputs) == (planned[0] / "brief.html").read_text(encoding="utf-8")


def test_html_is_self_contained(inputs):
    html_text = _page_html(inputs)
    page = _Page(html_text)
    names = [tag for tag, _ in page.tags]
    for banned in ("script", "link", "iframe", "object", "embed", "base"):
        assert banned not in names
    assert "url(" not in html_text and "@import" not in html_text
    for tag, attrs in page.tags:
        for key in ("src", "href"):
            value = (attrs.get(key) or "").strip().lower()
            assert not value.startswith(("http://", "https://", "//", "file:")), (tag, key, value[:60])
    images = [attrs["src"] for tag, attrs in page.tags if tag == "img"]
    assert len(images) == len(FIGURES)
    prefix = "data:image/png;base64,"
    embedded = {base64.b64decode(src[len(prefix):], validate=True) for src in images if src.startswith(prefix)}
    # every figure file is embedded byte for byte, and nothing else is
    assert embedded == {(inputs.folder / name).read_bytes() for name in FIGURES}


def test_key_figures_match_the_plan_summary(inputs, summary):
    text = _Page(_page_html(inputs)).text
    for name, (length, p_incident) in summary.items():
        route = inputs.routes[name]
        assert f"{route.length_m:.1f}" == length
        assert _has_number(text, length), length
        assert _has_number(text, p_incident), p_incident
        assert _has_number(text, f"{route.waypoint_length_m:.1f}")
        for w in route.waypoints:
            assert _has_number(text, f"{w.lat:.7f}") and _has_number(text, f"{w.lon:.7f}")


def test_notice_cautions_and_sections(inputs):
    content = brief_content(inputs)
    text = _Page(_page_html(inputs)).text
    assert NOTICE in text
    for caution in CAUTIONS:
        assert caution in text
    for section in content["sections"]:
        assert section["title"] in text
    for question, answer, _ in content["glance"]:
        assert question in text and answer in text
    for _, value in content["assumptions"]:
        assert value in text
    assert f"sha256 {inputs.site.sha256[:16]}" in text


def test_signoff_block_is_left_blank(inputs):
    html_text = _page_html(inputs)
    for label, _ in SIGNOFF_FIELDS:
        escaped = re.escape(html.escape(label))
        assert re.search(rf"<th>{escaped}</th><td style=\"height: \d+mm\"></td>", html_text), label
    for label in ("Site file checked against the yard on", "Rehearsed in a simulator on"):
        assert any(f.startswith(label) for f, _ in SIGNOFF_FIELDS)


def _signoff(inputs):
    blocks = brief_content(inputs)["sections"][-1]["blocks"]
    return next(b for b in blocks if b["kind"] == "signed"), next(b for b in blocks if b["kind"] == "signoff")


def test_signoff_binds_to_the_run_and_its_routes(planned, inputs):
    manifest = json.loads((planned[0] / "manifest.json").read_text())
    signed, signoff = _signoff(inputs)
    text = " ".join(f"{label} {value}" for label, value, _ in signed["items"])
    assert f"run id {manifest['run_id']}" in text
    assert manifest["input"]["sha256"] in text and f"veerwise {manifest['versions']['veerwise']}" in text
    # the route is a choice among the delivered routes, each named with its waypoint length
    choices = dict(signoff["choices"])
    assert choices["Route (tick one)"] == [f"{name} route ({inputs.routes[name].waypoint_length_m:.1f} m)"
                                           for name in ("cautious", "shortest")]
    # each delivered route is listed with the hash of the waypoint file it delivers
    for name, row in zip(("cautious", "shortest"), signed["routes"]["rows"], strict=True):
        assert row[0] == f"{name} route"
        assert f"routes-{name}.geojson (sha256 {manifest['files'][f'routes-{name}.geojson'][:16]}" in row[-1]


def test_decisions_cannot_contradict_the_banner(inputs):
    _, signoff = _signoff(inputs)
    decisions = dict(signoff["choices"])["Decision (tick one)"]
    assert decisions == ["approve for simulation",
                         "approve for a supervised trial under the site's rules and certified operators", "refuse"]
    text = _Page(_page_html(inputs)).text
    assert "not approved for field operation" in text
    assert "approve for field" not in text and "field trial under site rules" not in text


def test_signoff_is_printed_on_one_page_with_what_it_signs(planned, inputs):
    pages = [" ".join(t.split()) for t in _pdf_pages(planned[0] / "brief.pdf")]
    manifest = json.loads((planned[0] / "manifest.json").read_text())
    signature = [k for k, t in enumerate(pages) if "Signature" in t]
    assert len(signature) == 1
    page = pages[signature[0]]
    for part in ("7. Sign-off", "What is signed", f"run id {manifest['run_id']}", "Route (tick one)",
                 "Decision (tick one)", "refuse", "Site file checked against the yard on", "Rehearsed in a simulator on",
                 "cautious route", "shortest route"):
        assert part in page, part


@pytest.mark.parametrize("cautious, shortest", [(True, True), (False, True), (False, False)])
def test_banner_exactly_when_not_converged(inputs, cautious, shortest):
    changed = _with_convergence(inputs, cautious, shortest)
    content = brief_content(changed)
    text = _Page(render_html(content, changed)).text
    trust = dict((q, a) for q, a, _ in content["glance"])["Is the answer trustworthy?"]
    if cautious and shortest:
        assert "NOT CONVERGED" not in text and "NOT converged" not in text
        assert trust.startswith("Training converged for both policies")
    else:
        bad = " and ".join(n for n, ok in (("cautious", cautious), ("shortest", shortest)) if not ok)
        for name in bad.split(" and "):
            assert f"NOT CONVERGED: the learned {name} policy's risk does not agree with its exact reference" in text
            assert f"The learned {name} route must not be signed" in text
        assert trust.startswith("NO. Not converged")
        assert f"NOT CONVERGED: the learned {bad} route must not be signed; this briefing is not ready" in text


def test_risk_is_shown_compactly(inputs):
    """Headline rows at the planning drift; every row only as P(incident) by drift scale."""
    records = json.loads((inputs.folder / "risk.json").read_text())
    blocks = [b for s in brief_content(inputs)["sections"] for b in s["blocks"] if b["kind"] == "table"]
    scales = sorted({r["drift_scale"] for r in records})
    pivot = next(b for b in blocks if b["headers"][2:] == [f"drift x{m:g}" for m in scales])
    policies = list(dict.fromkeys(r["policy"] for r in records))
    noises = sorted({r["noise"] for r in records})
    assert len(pivot["rows"]) == len(policies) * len(noises)
    for r in records:
        row = next(x for x in pivot["rows"] if x[0] == r["policy"] and x[1] == f"{r['noise']:g}")
        cell = row[2 + scales.index(r["drift_scale"])]
        assert cell == format_prob(r["p_incident"]) + (" !" if r["mc_disagrees"] else "")
    headline = next(b for b in blocks if b["headers"][:4] == ["policy", "noise", "P(goal)", "P(incident)"])
    expected = [r for r in records if r["policy"] in ("cautious", "shortest") and r["drift_scale"] == 1.0]
    assert [(x[0], x[1], x[3]) for x in headline["rows"]] == [
        (r["policy"], f"{r['noise']:g}", format_prob(r["p_incident"])) for r in expected]


def test_text_cannot_break_out_of_the_page(inputs):
    content = brief_content(inputs)
    content["site"] = 'Yard </style><script>alert("x")</script> & "co"'
    html_text = render_html(content, inputs)
    assert "<script" not in html_text.lower()
    assert html_text.lower().count("</style>") == 1
    assert "&lt;script&gt;" in html_text


def test_missing_figure_is_refused(inputs, tmp_path):
    empty = dataclasses.replace(inputs, folder=tmp_path)
    with pytest.raises(RunFolderError, match="routes.png"):
        render_html(brief_content(empty), empty)


def test_every_kind_of_text_is_escaped(inputs):
    """Autoescaping: markup in any name or text reaches the page as text, in every block kind."""
    content = brief_content(inputs)
    evil = "<b>bold</b> & <i>it</i>"
    content["site"] = evil
    content["banners"] = [evil]
    content["glance"] = [(evil, evil, True)]
    content["sections"] = [{"title": evil, "blocks": [
        {"kind": "para", "text": evil, "small": False, "alert": False},
        {"kind": "subhead", "text": evil},
        {"kind": "list", "items": [evil], "keep": False},
        {"kind": "table", "headers": [evil, "x"], "rows": [[evil, "1"]], "numeric": (1,), "keep": True,
         "small": False, "narrow": False, "alerts": set()},
        {"kind": "figure", "file": "routes.png", "alt": evil, "caption": evil},
    ]}]
    page = render_html(content, inputs)
    assert "<b>" not in page and "<i>" not in page
    # title, h1, banner, question, answer, section title, para, subhead, list item, header cell,
    # body cell, alt text, caption
    assert page.count("&lt;b&gt;bold&lt;/b&gt; &amp; &lt;i&gt;it&lt;/i&gt;") == 13
    # the footer lives in CSS, where an entity would not be decoded: escaped the CSS way
    assert r"\3c b\3e bold\3c \2f b\3e  \26 " in page


def test_templates_are_package_data():
    """Every template file is matched by pyproject's package data, so installs carry them."""
    import tomllib

    import planner

    root = Path(planner.__file__).parent
    pyproject = tomllib.loads((root.parent / "pyproject.toml").read_text())
    globs = pyproject["tool"]["setuptools"]["package-data"]["planner"]
    files = sorted(p.relative_to(root).as_posix() for p in (root / "templates").rglob("*") if p.is_file())
    assert "templates/base.html.j2" in files
    for kind in ("para", "subhead", "table", "figure", "list", "signoff"):
        assert f"templates/blocks/{kind}.html.j2" in files
    for name in files:
        assert any(fnmatch.fnmatch(name, g) for g in globs), name


# ----------------------------------------------------------------------------- the PDF, read back with pypdf


def _pdf_pages(path: Path) -> list[str]:
    return [page.extract_text() for page in PdfReader(path).pages]


def _body_pages(pages: list[str], footer: str) -> list[str]:
    """Each page's text without its footer, checking that every page carries that footer."""
    lines = footer.split("\n")
    bodies = []
    for k, text in enumerate(pages, start=1):
        tail = [*lines, f"page {k} of {len(pages)}"]
        got = [line.strip() for line in text.strip().split("\n")][-len(tail):]
        assert got == tail, f"page {k} footer: {got}"
        bodies.append("\n".join(text.strip().split("\n")[:-len(tail)]))
    return bodies


def _same_text(html_text: str, pdf_text: str, repeatable: list[list[str]]) -> None:
    """The PDF says what the HTML says, word for word.

    Allowed differences: a word broken across two lines (``"ab" "cd"`` against
    ``"abcd"``), a table's header row repeated at the top of a page it continues on, and
    list bullets (drawn by the stylesheet, not text of the page).
    """
    a, b = html_text.split(), [w for w in pdf_text.split() if w != "\u2022"]
    matcher = difflib.SequenceMatcher(None, a, b, autojunk=False)
    for op, i1, i2, j1, j2 in matcher.get_opcodes():
        if op == "equal":
            continue
        if op == "replace" and "".join(a[i1:i2]) == "".join(b[j1:j2]):
            continue
        if op == "insert" and b[j1:j2] in repeatable:
            continue
        pytest.fail(f"HTML and PDF differ: {op} HTML {' '.join(a[max(0, i1 - 5):i2 + 5])!r} / "
                    f"PDF {' '.join(b[max(0, j1 - 5):j2 + 5])!r}")


def _header_rows(content: dict) -> list[list[str]]:
    return [" ".join(b["headers"]).split() for s in content["sections"] for b in s["blocks"]
            if b["kind"] == "table" and any(b["headers"])]


def test_pdf_has_the_text_of_the_html(planned, inputs):
    content = brief_content(inputs)
    pages = _pdf_pages(planned[0] / "brief.pdf")
    assert len(pages) in PAGES, len(pages)
    bodies = _body_pages(pages, footer_text(content))
    html_text = _Page((planned[0] / "brief.html").read_text(encoding="utf-8")).text
    _same_text(html_text, "\n".join(bodies), _header_rows(content))


def test_every_page_footer_identifies_the_run(planned, inputs):
    run = load_run(planned[0])
    footer = footer_text(brief_content(inputs))
    # the run id, the whole site hash and the version, on every page
    assert f"run {run.manifest['run_id']}" in footer
    assert f"sha256 {run.manifest['input']['sha256']}" in footer and len(run.manifest["input"]["sha256"]) == 64
    assert f"veerwise {run.manifest['versions']['veerwise']}" in footer
    _body_pages(_pdf_pages(planned[0] / "brief.pdf"), footer)


def test_run_id_is_the_hash_of_the_manifest_without_the_briefing(planned):
    manifest = json.loads((planned[0] / "manifest.json").read_text())
    # worked out here from the written manifest, independently of run_identity
    kept = {k: v for k, v in manifest.items() if k not in ("run_id", "created_utc", "timings_s")}
    kept["files"] = {k: v for k, v in manifest["files"].items() if k not in ("brief.html", "brief.pdf")}
    digest = hashlib.sha256(json.dumps(kept, sort_keys=True, separators=(",", ":")).encode()).hexdigest()
    assert manifest["run_id"] == digest[:12] == run_identity(manifest)
    # any change to a result file's hash changes the id
    manifest["files"]["risk.json"] = "0" * 64
    assert run_identity(manifest) != digest[:12]


def test_pdf_is_a4_with_figures_at_print_resolution(planned, inputs, tmp_path):
    tools = _poppler("reading the figures back from brief.pdf")
    pdf = _read_pdf(tools, planned[0] / "brief.pdf", tmp_path / "images")
    assert pdf["size"] == pytest.approx(A4_PT, abs=0.5)
    images = [f for f in pdf["listing"] if f[2] == "image"]
    assert [(int(f[3]), int(f[4])) for f in images] == [
        _png_size((inputs.folder / n).read_bytes()) for n in FIGURES]
    for f in images:
        # pdfimages -list gives each image's resolution as placed on the page
        assert int(f[12]) >= PRINT_PPI and int(f[13]) >= PRINT_PPI, f
    _check_pixels(pdf, inputs)


def test_weasyprint_uses_all_of_the_stylesheet(inputs, tmp_path, caplog):
    """WeasyPrint warns about CSS it ignores or resources it cannot load: there must be none."""
    import logging

    from planner.brief_page import write_pdf

    with caplog.at_level(logging.WARNING, logger="weasyprint"):
        write_pdf(tmp_path / "brief.pdf", _page_html(inputs))
    assert [r.getMessage() for r in caplog.records if r.name.startswith("weasyprint")] == []


def test_long_names_do_not_stall_the_pdf(inputs, tmp_path):
    """A 10,000-character word is the page's problem to wrap, not a loop's."""
    for name in FIGURES:
        shutil.copyfile(inputs.folder / name, tmp_path / name)
    long_name = "Z" * 10_000
    site = dataclasses.replace(inputs.site, name=long_name)
    changed = dataclasses.replace(inputs, folder=tmp_path, site=site)
    html_path, pdf_path = write_brief(changed, tmp_path / "brief.html", tmp_path / "brief.pdf")
    text = "".join("".join(_pdf_pages(pdf_path)).split())
    assert long_name in text


def test_without_pango_the_html_is_still_written(planned, tmp_path, monkeypatch):
    """No system libraries for WeasyPrint: brief.html is written, brief.pdf is not, one line says why."""
    from click.testing import CliRunner

    import planner.brief_page
    from planner.cli import cli

    folder = tmp_path / "run"
    shutil.copytree(planned[0], folder)
    monkeypatch.setattr(planner.brief_page, "_weasyprint", lambda: None)
    result = CliRunner().invoke(cli, ["brief", str(folder)])
    assert result.exit_code == 0, result.output
    assert (folder / "brief.html").is_file() and not (folder / "brief.pdf").exists()
    notes = [line for line in result.stderr.splitlines() if "brief.pdf" in line]
    assert len(notes) == 1 and "libpango-1.0-0" in notes[0], result.stderr
    manifest = json.loads((folder / "manifest.json").read_text())
    assert "brief.pdf" not in manifest["files"] and "brief.html" in manifest["files"]
    load_run(folder)  # the folder still passes its own checks


def test_brief_refuses_a_manifest_changed_after_the_run(planned, tmp_path):
    from click.testing import CliRunner

    from planner.cli import cli

    folder = tmp_path / "run"
    shutil.copytree(planned[0], folder)
    manifest = json.loads((folder / "manifest.json").read_text())
    manifest["notice"] = "approved"  # nothing else checks this entry; the run id does
    (folder / "manifest.json").write_text(json.dumps(manifest))
    before = (folder / "brief.html").read_bytes()
    result = CliRunner().invoke(cli, ["brief", str(folder), "-q"])
    assert result.exit_code == 2, result.output
    assert "manifest.json was changed after the run" in result.stderr and "Traceback" not in result.output
    assert (folder / "brief.html").read_bytes() == before


def test_plan_without_pango_writes_the_html_and_says_what_to_install(tmp_path, monkeypatch):
    import planner.brief_page

    monkeypatch.setattr(planner.brief_page, "_weasyprint", lambda: None)
    _, out, result = plan_small_site(tmp_path, *PLAN_ARGS)
    assert result.exit_code == 0, result.output
    assert (out / "brief.html").is_file() and not (out / "brief.pdf").exists()
    notes = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(notes) == 1 and "brief.pdf not written" in notes[0] and "libpango-1.0-0" in notes[0], notes
    assert "brief.pdf" not in json.loads((out / "manifest.json").read_text())["files"]


# ----------------------------------------------------------------------------- poppler and Chromium


def _tool(names, what, purpose):
    for name in names:
        path = shutil.which(name)
        if path:
            return path
    reason = (f"{what} not found on PATH ({', '.join(names)}); .ci/run installs it from Debian's packages. "
              f"Skipped: {purpose}.")
    warnings.warn(reason, stacklevel=2)
    pytest.skip(reason)


def _poppler(purpose: str) -> dict:
    return {name: _tool((name,), f"{name} (poppler-utils)", purpose) for name in POPPLER}


def _run(cmd) -> str:
    return subprocess.run([str(c) for c in cmd], check=True, capture_output=True, text=True, timeout=60).stdout


def _read_pdf(tools: dict, path: Path, scratch: Path) -> dict:
    """Page count and size, images (listed and extracted as PNG, in document order) and text."""
    info = _run([tools["pdfinfo"], path])
    pages = int(re.search(r"^Pages:\s+(\d+)", info, re.M).group(1))
    width, height = map(float, re.search(r"^Page size:\s+([\d.]+) x ([\d.]+) pts", info, re.M).groups())
    listing = [line.split() for line in _run([tools["pdfimages"], "-list", path]).splitlines()[2:]]
    scratch.mkdir()
    _run([tools["pdfimages"], "-png", path, scratch / "img"])
    extracted = sorted(scratch.glob("img-*.png"))
    # pdfimages writes a soft mask (alpha) as its own file right after its image
    kinds = [f[2] for f in listing]
    images = [(int(f[0]), int(f[3]), int(f[4])) for f in listing if f[2] == "image"]
    text = _run([tools["pdftotext"], path, "-"])
    return {"pages": pages, "size": (width, height), "images": images, "kinds": kinds, "listing": listing,
            "extracted": [e for e, kind in zip(extracted, kinds, strict=True) if kind == "image"],
            "masks": [e for e, kind in zip(extracted, kinds, strict=True) if kind == "smask"],
            "text": text, "page_texts": text.split("\f")[:pages]}


def _check_pixels(pdf: dict, inputs) -> None:
    """Every figure is there, in order, pixel for pixel, composited on white paper.

    A figure that failed to load would be missing or a placeholder, and one that loaded
    only in part would differ.
    """
    assert len(pdf["extracted"]) == len(FIGURES)
    masks = iter(pdf["masks"]) if len(pdf["masks"]) == len(FIGURES) else None
    for name, printed in zip(FIGURES, pdf["extracted"], strict=True):
        original = mpimg.imread(inputs.folder / name)
        if original.shape[2] == 4:
            original = original[..., :3] * original[..., 3:] + (1.0 - original[..., 3:])
        got = mpimg.imread(printed)[..., :3]
        if masks is not None:
            alpha = mpimg.imread(next(masks))
            alpha = alpha[..., None] if alpha.ndim == 2 else alpha[..., :1]
            got = got * alpha + (1.0 - alpha)
        # one 8-bit level: a colour-managed printer path may round differently
        assert_allclose(got, original[..., :3], rtol=0, atol=1.01 / 255, err_msg=name)


def _check_printed(pdf: dict, inputs, summary, footer_lines) -> None:
    """What every printed briefing must show, whoever printed it."""
    assert pdf["pages"] in PAGES, pdf["pages"]
    assert pdf["size"] == pytest.approx(A4_PT, abs=0.5)
    assert set(pdf["kinds"]) <= {"image", "smask"}
    assert [(w, h) for _, w, h in pdf["images"]] == [_png_size((inputs.folder / n).read_bytes()) for n in FIGURES]
    _check_pixels(pdf, inputs)
    text = " ".join(pdf["text"].split())
    for name, (length, p_incident) in summary.items():
        assert _has_number(text, length) and _has_number(text, p_incident), (name, length, p_incident)
    content = brief_content(inputs)
    assert " ".join(NOTICE.split()[:8]) in text
    for section in content["sections"]:
        assert section["title"] in text
    for question, _, _ in content["glance"]:
        assert question in text
    for label in ("Reviewed by (name, role)", "Date", "Signature", "What is signed"):
        assert label in text
    if not content["converged"]:
        assert "route must not be signed" in text
    for name in ("cautious", "shortest"):
        for w in inputs.routes[name].waypoints:
            assert _has_number(text, f"{w.lat:.7f}")
    with_image = {page for page, _, _ in pdf["images"]}
    for k, page_text in enumerate(pdf["page_texts"], start=1):
        body = page_text
        for line in footer_lines:
            body = body.replace(line, "")
        body = body.replace(f"page {k} of {pdf['pages']}", "")
        assert k in with_image or len(body.strip()) >= MIN_PAGE_CHARS, f"page {k} is nearly empty"


def test_pdf_carries_the_briefing(planned, inputs, summary, tmp_path):
    tools = _poppler("reading back brief.pdf")
    pdf = _read_pdf(tools, planned[0] / "brief.pdf", tmp_path / "images")
    _check_printed(pdf, inputs, summary, footer_text(brief_content(inputs)).split("\n"))
    assert f"page 1 of {pdf['pages']}" in pdf["text"]


def _print_with_chromium(browser: str, html_path: Path, pdf_path: Path, profile: Path) -> None:
    cmd = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={profile}", "--no-pdf-header-footer", f"--print-to-pdf={pdf_path}", html_path.as_uri()]
    # its own process group, so a hung browser and its helpers can all be stopped
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, start_new_session=True)
    try:
        _, err = proc.communicate(timeout=CHROMIUM_TIMEOUT_S)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.communicate()
        pytest.fail(f"chromium did not print {html_path.name} within {CHROMIUM_TIMEOUT_S} s")
    finally:
        try:
            os.killpg(proc.pid, signal.SIGKILL)  # helpers left behind, if any
        except ProcessLookupError:
            pass
    assert proc.returncode == 0 and pdf_path.is_file(), err.decode(errors="replace")[-2000:]


def test_browser_prints_the_briefing(planned, inputs, summary, tmp_path):
    """Headless Chromium loads brief.html from disk (no network) and prints it on A4.

    Read back with poppler: the page count is in range, every <img> became one image in
    the PDF (``pdfimages -list``), and each, extracted again (``pdfimages -png``), has
    the pixels of its PNG - which shows the data URI decoded whole: a figure that failed
    to load prints as nothing or a placeholder, one cut short prints partly blank. The
    key figures (route lengths, incident probabilities) must be in ``pdftotext``'s text.
    """
    purpose = "printing brief.html in a real browser"
    browser = _tool(CHROMIUM_NAMES, "Chromium", purpose)
    tools = _poppler(purpose)
    pdf_path = tmp_path / "printed.pdf"
    _print_with_chromium(browser, planned[0] / "brief.html", pdf_path, tmp_path / "profile")
    pdf = _read_pdf(tools, pdf_path, tmp_path / "images")
    images_in_html = sum(1 for tag, _ in _Page(_page_html(inputs)).tags if tag == "img")
    assert len(pdf["images"]) == images_in_html
    footer = footer_text(brief_content(inputs)).split("\n")
    _check_printed(pdf, inputs, summary, footer)
    # the page rules travel with the HTML: a browser prints the run's identity on every page too
    for k, page_text in enumerate(pdf["page_texts"], start=1):
        flat = " ".join(page_text.split())
        assert all(line in flat for line in footer) and f"page {k} of {pdf['pages']}" in flat, k
    signature = [t for t in pdf["page_texts"] if "Signature" in t]
    assert len(signature) == 1 and "What is signed" in signature[0] and "Decision (tick one)" in signature[0]


# ----------------------------------------------------------------------------- numbers a reviewer reads

#: A probability in the one notation (planner.notation): 0, a percentage with "1 in N"
#: beside it, a percentage alone above one half, or the floor; '!' marks a Monte Carlo flag.
ONE_NOTATION = re.compile(r"(0|-|< 1 in 10\^12|(< )?\d[\d.]*% \(1 in [\d.,]+( million| billion| trillion)?\)"
                          r"|(> )?\d[\d.]*%)( !)?")


def test_probabilities_are_written_in_one_notation(inputs):
    content = brief_content(inputs)
    text = _Page(render_html(content, inputs)).text
    assert "<1.0e-12" not in text and not re.search(r"(?<![\w.])1-\d", text)
    tables = [b for s in content["sections"] for b in s["blocks"] if b["kind"] == "table"]
    pivot = next(b for b in tables if b["headers"][2:3] == ["drift x1"])
    for row in pivot["rows"]:
        for cell in row[2:]:
            assert ONE_NOTATION.fullmatch(cell), cell
    for x in content["policies"]:
        assert ONE_NOTATION.fullmatch(x["p_incident"]), x["p_incident"]


def test_site_centre_and_usable_cells_are_those_check_prints(inputs, tmp_path):
    from click.testing import CliRunner

    from planner.cli import cli

    text = _Page(_page_html(inputs)).text
    # the centre of the boundary's lon/lat box, read straight from the site file the run copied
    data = json.loads((inputs.folder / "site.geojson").read_text())
    ring = next(f for f in data["features"] if f["properties"]["role"] == "boundary")["geometry"]["coordinates"][0]
    lon = (min(p[0] for p in ring) + max(p[0] for p in ring)) / 2
    lat = (min(p[1] for p in ring) + max(p[1] for p in ring)) / 2
    assert f"{lat:.5f} N, {lon:.5f} E (WGS 84)" in text
    spec = inputs.settings.grid
    result = CliRunner().invoke(cli, ["check", str(inputs.folder / "site.geojson"), "--cell", f"{spec.cell_m:g}",
                                      "--json"])
    grid = json.loads(result.stdout)["grid"]
    # the count the old check and briefing disagreed on: both count goal cells as usable
    assert grid["usable_cells"] == int(inputs.grid.passable().sum())
    assert f"{grid['usable_cells']:,} usable cells, {grid['goal_cells']:,} of them goal" in text
    printed = CliRunner().invoke(cli, ["check", str(inputs.folder / "site.geojson"), "--cell", f"{spec.cell_m:g}"])
    assert f"({grid['usable_cells']:,} usable, {grid['goal_cells']:,} of them goal;" in printed.stdout
    assert f"{lat:.5f} N, {lon:.5f} E" in printed.stdout


def test_figures_are_ranges_over_the_training_runs(inputs):
    content = brief_content(inputs)
    risky = dict((q, a) for q, a, _ in content["glance"])["How risky?"]
    rows = {r.policy: r for r in inputs.risk_rows if r.noise == content["noise"] and r.drift_scale == 1.0}
    for x in content["policies"]:
        seeds = inputs.manifest["results"][x["name"]]["p_incident_seeds"]
        assert len(seeds) == x["n_seeds"]
        lo, hi = min([*seeds, rows[x["name"]].p_incident]), max([*seeds, rows[x["name"]].p_incident])
        assert (x["p_incident_lo"], x["p_incident_hi"]) == (lo, hi)
        assert f"{x['name']} {probability_range(lo, hi)}" in risky
        # and at the table's strongest drift (x2 by default), the same way
        strong = inputs.manifest["results"][x["name"]]["p_incident_seeds_strong"]
        assert strong["drift_scale"] == 2.0 and len(strong["values"]) == x["n_seeds"]
        row = next(r for r in inputs.risk_rows if r.policy == x["name"] and r.noise == content["noise"]
                   and r.drift_scale == 2.0)
        values = [*strong["values"], row.p_incident]
        assert f"{x['name']} {probability_range(min(values), max(values))}" in risky.split("over the training runs")[-1]


@pytest.mark.parametrize("matching", [2, 1])
def test_seeds_banner_exactly_when_the_training_runs_disagree_on_a_route(inputs, matching):
    manifest = json.loads(json.dumps(inputs.manifest))
    for name in ("cautious", "shortest"):
        manifest["results"][name]["seed_routes_matching"] = matching if name == "cautious" else 2
        manifest["results"][name]["n_seeds"] = 2
    changed = dataclasses.replace(inputs, manifest=manifest)
    content = brief_content(changed)
    text = _Page(render_html(content, changed)).text
    banner = "SEEDS DISAGREE on the cautious route: only 1 of 2 training runs keep within 2 cells"
    assert (banner in text) == (matching < 2)
    assert "SEEDS DISAGREE on the shortest route" not in text
    trust, alert = next((a, flag) for q, a, flag in content["glance"] if q == "Is the answer trustworthy?")
    assert ("the training runs disagree on the cautious route" in trust) == (matching < 2)
    assert alert or matching == 2


def test_time_stamp_and_hashes_are_printed_verbatim(inputs):
    """Markup that keeps numbers whole never lands inside a date or a hash."""
    page = _page_html(inputs)
    created = inputs.manifest["created_utc"]
    assert page.count(created) == 2  # the line under the title, and what is signed
    assert inputs.site.sha256 in page


def test_without_the_python_package_the_note_says_pip(monkeypatch):
    import importlib.util

    import planner.brief_page

    monkeypatch.setattr(planner.brief_page, "_weasyprint", lambda: None)
    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "weasyprint" else real(name, *a))
    assert "pip install weasyprint" in planner.brief_page.pdf_unavailable()


@pytest.mark.parametrize("flagged", [False, True])
def test_the_trust_answer_names_a_grid_check_beyond_tolerance(inputs, flagged):
    # The rows' half-cell records set by hand: the shortest route's figure at half the
    # cell is 0.5 x (flagged) or 1.02 x (within tolerance) the reported one.
    rows = []
    for r in inputs.risk_rows:
        if r.grid_check and r.policy == "shortest":
            ratio = 0.5 if flagged else 1.02
            check = dict(r.grid_check, p_incident_fine=r.p_incident * ratio, relative=ratio - 1.0,
                         difference=r.p_incident * (ratio - 1.0), flagged=flagged, skipped=None)
            r = dataclasses.replace(r, grid_check=check)
        elif r.grid_check:
            r = dataclasses.replace(r, grid_check=dict(r.grid_check, flagged=False))
        rows.append(r)
    changed = dataclasses.replace(inputs, risk_rows=rows)
    content = brief_content(changed)
    trust, alert = next((a, flag) for q, a, flag in content["glance"] if q == "Is the answer trustworthy?")
    assert ("The grid check differs beyond its tolerance for the shortest route" in trust) == flagged
    assert "cautious route (" not in trust.split("grid check")[-1]
    if flagged:
        assert "-50%" in trust and alert
