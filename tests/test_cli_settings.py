"""``plan --settings``: options from a TOML file or a run's manifest, command line first."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest
from click.testing import CliRunner
from conftest import plan_small_site, small_site_dict

from planner.cli import cli

#: The small settings of tests/test_cli_plan.py, written as a settings file.
SMALL_TOML = """\
# a yard's rarely changed settings
[grid]
cell = 2.0

[vehicle-and-motion]
slip = 0.05

[learning]
episodes = 2000
max-sweeps = 4
training-runs = 2
root-seed = 5

[risk-table]
table-noises = [0, 0.1]
rollouts = 300
"""


def sha256(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def settings_of(run) -> dict:
    return json.loads((Path(run) / "manifest.json").read_text())["settings"]


@pytest.fixture(scope="module")
def from_toml(tmp_path_factory):
    """A plan made from SMALL_TOML with one option (--stall) given on the command line."""
    root = tmp_path_factory.mktemp("toml")
    toml = root / "yard.toml"
    toml.write_text(SMALL_TOML)
    site, out, result = plan_small_site(root, "--settings", toml, "--stall", "0.01", "--slip", "0.02")
    return toml, site, out, result


def test_settings_file_values_reach_the_plan_and_the_command_line_wins(from_toml):
    toml, _, out, result = from_toml
    assert result.exit_code == 0, result.output
    s = settings_of(out)
    assert s["grid"]["cell_m"] == 2.0
    assert s["learn"]["episodes"] == 2000 and s["learn"]["max_sweeps"] == 4 and s["learn"]["n_seeds"] == 2
    assert s["noises"] == [0.0, 0.1] and s["rollouts"] == 300 and s["seed"] == 5
    assert s["dynamics"]["stall"] == 0.01  # only on the command line
    assert s["dynamics"]["slip"] == 0.02  # in the file (0.05) and on the command line: the command line wins
    assert s["settings_file"] == str(toml) and s["settings_sha256"] == sha256(toml)


def test_a_run_is_made_again_from_its_manifest(from_toml, tmp_path):
    _, _, first, result = from_toml
    assert result.exit_code == 0, result.output
    again = tmp_path / "again"
    made = CliRunner().invoke(cli, ["plan", str(first / "site.geojson"), str(again), "--settings",
                                    str(first / "manifest.json"), "-q"])
    assert made.exit_code == 0, made.output
    a, b = settings_of(first), settings_of(again)
    provenance = {"settings_file", "settings_sha256"}
    assert {k: v for k, v in a.items() if k not in provenance} == {k: v for k, v in b.items() if k not in provenance}
    assert b["settings_file"] == str(first / "manifest.json")
    # same settings and the same root seed: the same policies, risk table and waypoints, byte for byte
    for name in ("policies.npz", "training.npz", "risk.json", "waypoints-cautious.csv", "waypoints-shortest.csv"):
        assert sha256(first / name) == sha256(again / name), name
    assert "is not the site file" not in made.output


def test_a_manifest_given_another_site_says_so(from_toml, tmp_path):
    _, _, first, _ = from_toml
    other = small_site_dict()
    other["features"][3]["properties"]["buffer_m"] = 3.0
    site = tmp_path / "other.geojson"
    site.write_text(json.dumps(other))
    made = CliRunner().invoke(cli, ["plan", str(site), str(tmp_path / "run"), "--settings",
                                    str(first / "manifest.json"), "-q", "--rollouts", "0"])
    assert made.exit_code == 0, made.output
    assert "is not the site file the run in" in made.output


@pytest.mark.parametrize("text, message", [
    ("celll = 2\n", "'celll' is not an option of plan"),
    ("[grid]\nslip = 0.1\n", "'slip' belongs in another section than [grid]"),
    ("[vehicle]\nslip = 0.1\n", "table [vehicle] is not a section of plan's options"),
    # the value passes the option's type and is refused by the setting's own rule, named by its key
    ("slip = 2\n", "slip must be a number in [0, 1], got 2.0"),
    ("grid-check = \"yes\"\n", "grid-check = 'yes': 'yes' is not true or false"),
    ("headings = true\n", "headings = True: True is not a value of --headings"),
    ("table-noises = [0, \"x\"]\n", "table-noises = [0, 'x']: a list must hold numbers only"),
    ("force = true\n", "'force' is given on the command line only"),
    ("slip = 0.1\nslip = 0.2\n", "not a TOML file"),
    ("[grid\n", "not a TOML file"),
])
def test_bad_settings_files_are_one_line_naming_file_and_key(tmp_path, no_heavy_work, text, message):
    toml = tmp_path / "bad.toml"
    toml.write_text(text)
    site, out, result = plan_small_site(tmp_path, "--settings", toml)
    assert result.exit_code == 2, result.output
    assert len(result.output.strip().splitlines()) == 1, result.output
    assert str(toml) in result.output and message in result.output, result.output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.toml", "site.geojson"]


def test_a_missing_settings_file_is_one_line(tmp_path, no_heavy_work):
    _, out, result = plan_small_site(tmp_path, "--settings", tmp_path / "nowhere.toml")
    assert result.exit_code == 2 and len(result.output.strip().splitlines()) == 1, result.output
    assert "nowhere.toml" in result.output and not out.exists()


def test_a_manifest_with_a_setting_no_option_sets_is_refused(from_toml, tmp_path, no_heavy_work):
    _, _, first, _ = from_toml
    manifest = json.loads((first / "manifest.json").read_text())
    manifest["settings"]["convergence_threshold"] = 0.5
    path = tmp_path / "manifest.json"
    path.write_text(json.dumps(manifest))
    site, out, result = plan_small_site(tmp_path, "--settings", path)
    assert result.exit_code == 2 and len(result.output.strip().splitlines()) == 1, result.output
    assert "setting convergence_threshold = 0.5 has no plan option" in result.output
    assert not out.exists()


def test_the_shipped_example_settings_file_is_read_whole(tmp_path, no_heavy_work):
    # Every key of examples/yard-settings.toml is an option in its section: a dry
    # read through the same callback plan uses, with the heavy work refused.
    from planner.cli.plan_commands import plan
    from planner.cli.settings_file import values_from_toml

    example = Path(__file__).resolve().parent.parent / "examples" / "yard-settings.toml"
    values = values_from_toml(example, example.read_bytes(), plan)
    assert {"cell", "headings", "slip", "table-noises", "table-drifts"} <= set(values)
