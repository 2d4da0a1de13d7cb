"""One rule per setting: the library names the setting, the command line its option.

A Python user who builds ``Dynamics(slip=2)`` is told ``Dynamics.slip``; a command-line
user who types ``--slip 2`` is told ``--slip``, by the same rule and the same words; a
value from a settings file is named by its key in that file.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import click
import pytest

from planner import checks
from planner.cli import cli
from planner.cli.option_names import SETTING_OPTIONS, as_keys, as_options
from planner.errors import SettingsError
from planner.grid import GridSpec
from planner.learn import LearnSettings
from planner.motion import Dynamics
from tests.conftest import plan_small_site

PLANNER = Path(__file__).resolve().parents[1] / "planner"


@pytest.mark.parametrize(("make", "said"), [
    (lambda: Dynamics(slip=2.0), "Dynamics.slip must be a number in [0, 1], got 2.0"),
    (lambda: Dynamics(n_actions=5), "Dynamics.n_actions must be 4, 8 or 16, got 5"),
    (lambda: Dynamics(drift_scale=-1.0), "Dynamics.drift_scale must be a finite number >= 0, got -1.0"),
    (lambda: GridSpec(cell_m=-1.0), "GridSpec.cell_m must be a positive number of metres, got -1.0"),
    (lambda: LearnSettings(n_seeds=0), "LearnSettings.n_seeds must be a whole number >= 1, got 0"),
    (lambda: LearnSettings(step_decay=0.5), "LearnSettings.step_decay must be a number in (0.5, 1] (or unset), "
                                            "got 0.5"),
])
def test_the_library_names_the_setting(make, said):
    with pytest.raises(SettingsError) as info:
        make()
    assert str(info.value) == said


@pytest.mark.parametrize(("args", "said"), [
    (["--slip", "2"], "--slip must be a number in [0, 1], got 2.0"),
    (["--headings", "5"], "--headings must be 4, 8 or 16, got 5"),
    (["--plan-drift", "nan"], "--plan-drift must be a finite number >= 0, got nan"),
    (["--cell", "-1"], "--cell must be a positive number of metres, got -1.0"),
    (["--training-runs", "0"], "--training-runs must be a whole number >= 1, got 0"),
    (["--epsilon", "1"], "--epsilon must be a number in [0, 1), got 1.0"),
    (["--table-noises", "0.1,1.5"], "--table-noises must be a number in [0, 1), got 1.5"),
    (["--root-seed", "-1"], "--root-seed must be a whole number in [0, 2**128), got -1"),
    (["--grid-levels", "4"], "--grid-levels must be 2 or 3, got 4"),
    (["--tie-m", "-1"], "--tie-m must be a number of metres-equivalent >= 0, got -1.0"),
    (["--alt-m", "20000"], "--alt-m must be a number of metres above ground in [0, 10000] (or unset), got 20000.0"),
    (["--budget-min", "5"], "--budget-min needs --speed-mps, the vehicle's speed over ground"),
    (["--table-drifts", "2"], "--table-drifts must include the planning drift --plan-drift 1"),
])
def test_the_command_line_says_the_same_rule_with_its_option(tmp_path, no_heavy_work, args, said):
    _, out, result = plan_small_site(tmp_path, *args)
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and said in lines[0] and "Traceback" not in result.output, result.output
    assert not out.exists()


def test_a_settings_file_value_is_named_by_its_key_and_the_file(tmp_path, no_heavy_work):
    toml = tmp_path / "yard.toml"
    toml.write_text("[vehicle-and-motion]\nstall = 1.5\n")
    _, out, result = plan_small_site(tmp_path, "--settings", toml)
    assert result.exit_code == 2, result.output
    assert result.output.strip() == (f"veerwise: error: --settings {toml}: stall must be a number in [0, 1], "
                                     "got 1.5"), result.output
    # the same value typed on the command line overrides the file and is named as an option
    _, _, typed = plan_small_site(tmp_path, "--settings", toml, "--stall", "2")
    assert "--stall must be a number in [0, 1], got 2.0" in typed.output and "--settings" not in typed.output


def test_translation_leaves_other_dotted_words_alone():
    text = "run/site.geojson: Dynamics.slip must be set (see brief.html, e.g. 0.1); Owner.unknown stays"
    assert as_options(text) == "run/site.geojson: --slip must be set (see brief.html, e.g. 0.1); Owner.unknown stays"
    assert as_keys("PlanSettings.noises must include PlanSettings.epsilon 0.1") == \
        "table-noises must include epsilon 0.1"


def _long_options() -> set[str]:
    found = set()
    for command in cli.commands.values():
        for param in command.params:
            if isinstance(param, click.Option):
                found.update(o for o in (*param.opts, *param.secondary_opts) if o.startswith("--"))
    return found


def test_every_translated_setting_names_an_option_that_exists():
    options = _long_options()
    missing = {name: flag for name, flag in SETTING_OPTIONS.items() if flag.split("/")[-1] not in options}
    assert not missing


def _text(node) -> str:
    """The literal text of a message expression, each interpolated value as ``{}``."""
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return node.value
    if isinstance(node, ast.JoinedStr):
        return "".join(_text(v) if isinstance(v, ast.Constant) else "{}" for v in node.values)
    if isinstance(node, ast.BinOp):
        return _text(node.left) + _text(node.right)
    return ""


def _raised_messages():
    """(module, line, text) of every error message a library module raises."""
    for path in sorted(PLANNER.glob("*.py")):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            if isinstance(node, ast.Raise) and isinstance(node.exc, ast.Call) and node.exc.args:
                yield path.name, node.lineno, _text(node.exc.args[0])


def test_library_errors_name_no_command_line_option():
    quoting = [(m, n, t) for m, n, t in _raised_messages() if re.search(r"(?<![\w-])--[a-z]", t)]
    assert not quoting


def test_every_setting_a_library_error_names_is_known():
    named = set()
    for _, _, text in _raised_messages():
        named.update(re.findall(r"\b((?:GridSpec|Dynamics|LearnSettings|PlanSettings)\.[a-z_]+)\b", text))
    # fields set by the program, not by an option, keep their library names on the command line too
    internal = {"Dynamics.step_cost", "LearnSettings.schedule", "LearnSettings.sweep_horizon"}
    assert named - internal <= set(SETTING_OPTIONS), named - internal - set(SETTING_OPTIONS)
    assert named, "the scan found no setting names: the test would pass vacuously"


def test_no_plan_option_carries_a_range_of_its_own():
    # the range is the setting's rule; a click range type would be a second copy of it
    plan = cli.commands["plan"]
    ranged = [p.name for p in plan.params if isinstance(p.type, click.types._NumberRangeBase)]
    assert not ranged


@pytest.mark.parametrize(("value", "ok"), [(0, True), (2**128 - 1, True), (2**128, False), (-1, False),
                                           (1.0, False), (True, False), (None, True)])
def test_one_seed_rule(value, ok):
    if ok:
        checks.seed(value, "PlanSettings.seed")
    else:
        with pytest.raises(SettingsError, match=r"^PlanSettings\.seed must be a whole number in \[0, 2\*\*128\)"):
            checks.seed(value, "PlanSettings.seed")
