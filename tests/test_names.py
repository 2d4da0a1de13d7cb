"""Names are data: what a name may be, and how each output writes it.

Property tests over arbitrary text (hypothesis) for the rules of ``planner.names``,
and end-to-end checks that a hostile name cannot act in a spreadsheet, a terminal or
a figure.
"""

from __future__ import annotations

import csv
import io
import json
import unicodedata

import pytest
from click.testing import CliRunner
from conftest import small_site_dict
from hypothesis import given, settings
from hypothesis import strategies as st

from planner.cli import cli
from planner.errors import SiteError
from planner.names import MAX_NAME_CHARS, check_unique, clean_name, csv_cell, for_terminal
from planner.site import site_from_geojson

QUICK = ["--cell", "2", "--episodes", "200", "--training-runs", "1", "--rollouts", "0", "--table-noises", "0.1",
         "--table-drifts", "1", "--root-seed", "3", "-q"]
#: Characters that must never pass: control, line breaks, direction controls, zero-width.
FORBIDDEN = ["\x1b", "\n", "\r", "\t", "\x00", "\x7f", "\u0085", "\u2028", "\u2029", "\u202e", "\u202d",
             "\u2066", "\u2067", "\u2069", "\u200e", "\u200f", "\u061c", "\u200b", "\u200c", "\u200d",
             "\u2060", "\ufeff", "\ud800", "\udfff"]


def invoke(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def site_named(name, index=3) -> dict:
    site = small_site_dict()
    site["features"][index]["properties"]["name"] = name
    return site


# ----------------------------------------------------------------------------- the rules, as properties


@settings(max_examples=300, deadline=None)
@given(st.text(max_size=2 * MAX_NAME_CHARS))
def test_a_name_is_accepted_only_as_bounded_printable_nfc_text(raw):
    try:
        name = clean_name(raw, "feature 3")
    except SiteError as err:
        assert str(err).startswith("feature 3"), err
        assert for_terminal(str(err)) == str(err)  # the refusal itself cannot act on a terminal
        return
    assert name == unicodedata.normalize("NFC", raw)
    assert len(name) <= MAX_NAME_CHARS
    assert name.isprintable() and name == name.strip()
    assert not any(ch in name for ch in FORBIDDEN)


@pytest.mark.parametrize("ch", FORBIDDEN, ids=[f"U+{ord(c):04X}" for c in FORBIDDEN])
def test_every_control_direction_and_zero_width_character_is_refused_by_name(ch):
    with pytest.raises(SiteError, match=f"U\\+{ord(ch):04X}"):
        clean_name(f"Pond{ch}North", "feature 3")


def test_names_are_nfc_normalised():
    # "e" + COMBINING ACUTE ACCENT is the same name as the precomposed letter (Unicode UAX #15, NFC).
    assert clean_name("Cafe\u0301", "f") == "Caf\u00e9"


@settings(max_examples=200, deadline=None)
@given(st.text(min_size=1, max_size=20).filter(lambda t: t.isprintable() and t == t.strip()))
def test_two_names_equal_after_normalisation_or_case_are_refused(name):
    variants = [unicodedata.normalize("NFD", name), name.upper(), name.lower()]
    for other in variants:
        if other == name or not other.isprintable() or other != other.strip():
            continue
        with pytest.raises(SiteError):
            check_unique([("feature 3", name), ("feature 4", other)], "site")


def test_names_that_give_the_same_table_column_are_refused():
    # The risk table writes an interval as NAME, NAME_lo, NAME_hi: 'Pond' and 'Pond_lo' would share a column.
    with pytest.raises(SiteError, match="same table column 'Pond_lo'"):
        check_unique([("feature 3", "Pond"), ("feature 4", "Pond_lo")], "site")


@settings(max_examples=300, deadline=None)
@given(st.text(max_size=30))
def test_a_csv_cell_is_never_a_formula_and_reads_back(text):
    buf = io.StringIO()
    csv.writer(buf).writerow([csv_cell(text)])
    (back,) = next(csv.reader(io.StringIO(buf.getvalue())))
    # OWASP, "CSV Injection": a cell starting with = + - @ tab or CR is run as a formula.
    assert not back.startswith(("=", "+", "-", "@", "\t", "\r"))
    assert back in (text, "'" + text)


@settings(max_examples=300, deadline=None)
@given(st.text(max_size=30))
def test_terminal_text_is_one_printable_line(text):
    shown = for_terminal(text)
    assert shown.isprintable()
    assert shown == text or "\\" in shown


# ----------------------------------------------------------------------------- at the command line


@pytest.mark.parametrize("name,fragment", [
    ("Pond\x1b[2J\x1b[1;1Hveerwise: all clear", "U+001B"),
    ("Pond\nveerwise: all clear", "U+000A"),
    ("Pond \u202etxt.exe", "U+202E"),
    ("Po\u200bnd", "U+200B"),
    ("\ud800Pond", "U+D800"),
    ("P" * 10_000, "10,000 characters"),
], ids=["escape sequence", "line break", "right-to-left override", "zero-width space", "lone surrogate",
        "10,000 characters in one word"])
@pytest.mark.parametrize("command", ["check", "plan"])
def test_a_hostile_name_is_refused_in_one_safe_line(tmp_path, name, fragment, command):
    site = tmp_path / "site.geojson"
    site.write_text(json.dumps(site_named(name)))  # json.dumps escapes: the file is plain ASCII
    args = [command, site, "--cell", "2"] if command == "check" else [command, site, tmp_path / "run",
                                                                      *QUICK]
    result = invoke(*args)
    assert result.exit_code == 2, result.output
    lines = result.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("veerwise: error: "), result.stderr
    assert "feature 3" in lines[0] and fragment in lines[0]
    assert lines[0].isprintable()
    assert not (tmp_path / "run").exists()


def test_duplicate_names_after_mapping_are_refused_at_the_command_line(tmp_path):
    site = site_named("gust-lane", index=3)
    site["features"][4]["properties"]["name"] = "Gust lane"
    path = tmp_path / "site.geojson"
    path.write_text(json.dumps(site))
    result = invoke("check", path, "--cell", "2")
    assert result.exit_code == 2 and "feature 4" in result.stderr and "feature 3" in result.stderr


def test_formula_names_reach_csv_as_text(tmp_path):
    path = tmp_path / "site.geojson"
    path.write_text(json.dumps(site_named('=HYPERLINK("http://example.invalid","x")')))
    out = tmp_path / "run"
    result = invoke("plan", path, out, *QUICK)
    assert result.exit_code == 0, result.output
    for name in ("waypoints-cautious.csv", "waypoints-shortest.csv"):
        rows = [r for r in csv.reader(io.StringIO((out / name).read_text())) if r and not r[0].startswith("#")]
        cells = [cell for row in rows for cell in row]
        assert "'=HYPERLINK(\"http://example.invalid\",\"x\")" in cells
        assert not any(cell.startswith(("=", "+", "@")) for cell in cells)
        assert not any(cell.startswith("-") and not _number(cell) for cell in cells)


def _number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


@pytest.mark.parametrize("name", ["Pond $\\undefinedcommand{x}$", "Pond \\ with a backslash $", "$x^$"])
def test_a_name_with_mathtext_draws_as_text(tmp_path, name):
    path = tmp_path / "site.geojson"
    path.write_text(json.dumps(site_named(name)))
    result = invoke("grid", path, "--cell", "2", "-o", tmp_path / "grid.png")
    assert result.exit_code == 0, result.output
    assert (tmp_path / "grid.png").stat().st_size > 0


def test_a_site_built_in_memory_checks_names_the_same_way():
    with pytest.raises(SiteError, match="U\\+202E"):
        site_from_geojson(site_named("a\u202eb"))
