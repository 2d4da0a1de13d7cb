"""Options a person can hold in mind: help in sections, names that cannot be confused,
one meaning of -o, ranges and computed defaults shown, an example in every help; and
the plan summary's layout (warnings on lines of their own) and the risk table's lines."""

from __future__ import annotations

import json
import re

import pytest
from click.testing import CliRunner
from conftest import feature, plan_small_site, rect, small_site_dict

from planner.cli import cli

COMMANDS = ("check", "grid", "plan", "risk", "export", "brief")
SMALL = ["--cell", "2", "--episodes", "2000", "--training-runs", "2", "--rollouts", "300", "--root-seed", "5"]


def help_text(command: str) -> str:
    result = CliRunner().invoke(cli, [command, "--help"])
    assert result.exit_code == 0, result.output
    return result.output


@pytest.mark.parametrize("command", COMMANDS)
def test_every_command_has_an_example_in_its_help(command):
    text = help_text(command)
    assert re.search(r"Examples?:\n\s+veerwise " + command + r" ", text), text


def test_plan_help_is_in_sections_with_ranges_and_computed_defaults():
    text = help_text("plan")
    flat = " ".join(text.split())
    sections = re.findall(r"^([A-Z][A-Za-z ]+):$", text, re.M)
    assert sections[:6] == ["Output", "Site file", "Grid", "Vehicle and motion", "Learning", "Risk table"]
    # ranges are said beside the options that have one
    assert re.search(r"--epsilon NUMBER.{0,120}?in \[0, 1\)", flat)
    assert re.search(r"--slip NUMBER.{0,120}?in \[0, 1\]", flat)
    # computed defaults say how they are computed
    assert "about 1/100 of the site's longer side" in flat
    assert "50 per usable cell, 20,000 to 500,000" in flat
    assert "twice the longest cheapest route to the goal" in flat


def test_names_that_cannot_be_confused():
    text = help_text("plan")
    options = set(re.findall(r"(--[a-z][a-z-]+)", text))
    assert {"--plan-drift", "--table-drifts", "--table-noises", "--root-seed", "--training-runs"} <= options
    # the old pairs that differed by one letter are gone
    assert not options & {"--drift-scale", "--drift-scales", "--seed", "--seeds", "--noise", "--out"}
    # -o means one file on every command that has it
    for command in ("grid", "export"):
        assert re.search(r"-o, --output FILE", help_text(command))
    assert "-o" not in re.findall(r"(?<![\w-])-o(?![\w-])", help_text("plan"))


def test_renamed_options_are_refused_with_a_pointer(tmp_path):
    site = tmp_path / "site.geojson"
    site.write_text(json.dumps(small_site_dict()))
    result = CliRunner().invoke(cli, ["plan", str(site), str(tmp_path / "run"), "--drift-scale", "2"])
    assert result.exit_code == 2 and "--drift-scale" in result.stderr
    assert not (tmp_path / "run").exists()


def test_summary_puts_each_warning_on_lines_of_its_own(tmp_path):
    data = small_site_dict()
    # a zone wholly outside the boundary: the site loads, with a warning
    data["features"].append(feature("rough", "Polygon", rect(200, 200, 210, 210), name="Far field", cost_factor=2))
    site = tmp_path / "site.geojson"
    site.write_text(json.dumps(data))
    out = tmp_path / "run"
    result = CliRunner().invoke(cli, ["plan", str(site), str(out), *SMALL])
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    i = lines.index("warnings      1")
    assert lines[i + 1].startswith("  - feature 6 ('Far field'): lies wholly outside the boundary")
    # only a line holding a path longer than the page may run over (paths are never broken)
    assert all(len(line) < 100 for line in lines if str(out) not in line)


def test_risk_prints_one_line_per_row_and_details_on_request(tmp_path):
    _, out, result = plan_small_site(tmp_path, *SMALL)
    assert result.exit_code == 0, result.output
    args = ["risk", str(out), "--rollouts", "0", "--table-noises", "0,0.1", "--table-drifts", "1,2"]
    short = CliRunner().invoke(cli, args).stdout.splitlines()
    # header, rule, 2 policies x 2 noises x 2 drifts, and the hint
    assert len(short) == 2 + 8 + 1 and short[-1].startswith("(one line per row")
    detailed = CliRunner().invoke(cli, [*args, "--details"]).stdout
    assert "incidents: boundary" in detailed and "Pond" in detailed and "Pond" not in "\n".join(short)
