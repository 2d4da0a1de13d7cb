"""The command line's names for the library's settings, and the one place messages are translated.

The library names a setting by its owner and field (``Dynamics.slip``, see
:mod:`planner.checks`), so that a Python user is told which argument to change. A
command-line user changes options, so every error a command prints goes through
:func:`as_options`, which replaces each setting name by its option (``--slip``); a value
that came from a ``--settings`` file is named by its key in that file, and a campaign's
by its key in the campaign file (:func:`as_keys`).
"""

from __future__ import annotations

import re

import click
from click.core import ParameterSource

#: Setting (owner.field) -> long option. Several settings share an option where one
#: option sets them all (``--crs`` reaches the site reader and the plan settings).
SETTING_OPTIONS = {
    "GridSpec.cell_m": "--cell",
    "GridSpec.hazard_overlap": "--hazard-overlap",
    "GridSpec.boundary_cover": "--boundary-cover",
    "GridSpec.max_cells": "--max-cells",
    "Dynamics.n_actions": "--headings",
    "Dynamics.move_m": "--move-m",
    "Dynamics.slip": "--slip",
    "Dynamics.stall": "--stall",
    "Dynamics.drift_scale": "--plan-drift",
    "Dynamics.edge": "--edge",
    "Dynamics.hazard_penalty_m": "--penalty",
    "LearnSettings.epsilon": "--epsilon",
    "LearnSettings.step_size": "--step-size",
    "LearnSettings.step_decay": "--step-decay",
    "LearnSettings.gamma": "--gamma",
    "LearnSettings.episodes": "--episodes",
    "LearnSettings.max_steps": "--max-steps",
    "LearnSettings.n_seeds": "--training-runs",
    "LearnSettings.start_mode": "--start-mode",
    "LearnSettings.q_init": "--q-init",
    "LearnSettings.max_sweeps": "--max-sweeps",
    "PlanSettings.epsilon": "--epsilon",
    "PlanSettings.episodes_shortest": "--episodes",
    "PlanSettings.noises": "--table-noises",
    "PlanSettings.drift_scales": "--table-drifts",
    "PlanSettings.budget_m": "--budget-m",
    "PlanSettings.budget_min": "--budget-min",
    "PlanSettings.speed_mps": "--speed-mps",
    "PlanSettings.rollouts": "--rollouts",
    "PlanSettings.seed": "--root-seed",
    "PlanSettings.crs": "--crs",
    "PlanSettings.fix": "--fix",
    "PlanSettings.max_bytes": "--max-bytes",
    "PlanSettings.alt_m": "--alt-m",
    "PlanSettings.tie_m": "--tie-m",
    "PlanSettings.cautious_schedule": "--cautious-schedule",
    "PlanSettings.shortest_schedule": "--shortest-schedule",
    "PlanSettings.grid_check": "--grid-check",
    "PlanSettings.grid_levels": "--grid-levels",
    "PlanSettings.risk_budget": "--risk-budget",
    "PlanSettings.budget_set_by": "--budget-set-by",
    "load_site.crs": "--crs",
    "load_site.fix": "--fix",
    "load_site.max_bytes": "--max-bytes",
    "constant_ground.elevation_m": "--ground-elev-m",
    "dem_ground.path": "--dem",
    "parse_datum.text": "--vertical-datum",
    "export.alt_m": "--alt-m",
    "export.output": "-o/--output",
    "export.fmt": "--format",
    "export.formats": "--format",
    "export.force": "--force",
    "write_run.force": "--force",
    "risk_table.fmt": "--format",
    "risk.budget": "--budget-m",
    "risk.rollouts": "--rollouts",
    "run_risk.seed": "--rollout-seed",
    "run_risk.policies": "--policy",
    "campaign.scheduler": "--scheduler",
}

_NAME = re.compile(r"(?<![\w.-])([A-Za-z_]\w*\.[a-z_]\w*)(?![\w-])")


def _option_param(ctx: click.Context | None, option: str):
    """The parameter of ``ctx``'s command that ``option`` (``--slip``) belongs to, or None."""
    if ctx is None:
        return None
    longest = option.split("/")[-1]
    for param in ctx.command.params:
        if isinstance(param, click.Option) and longest in (*param.opts, *param.secondary_opts):
            return param
    return None


def as_options(text: str, ctx: click.Context | None = None) -> str:
    """``text`` with every setting name replaced by the option that sets it.

    With the command's context, a setting whose value came from ``--settings FILE`` is
    named by its key in that file, and the message says which file.

    >>> as_options("Dynamics.slip must be a number in [0, 1], got 2")
    '--slip must be a number in [0, 1], got 2'
    """
    from_file = []

    def option(match: re.Match) -> str:
        name = match.group(1)
        flag = SETTING_OPTIONS.get(name)
        if flag is None:
            return name
        param = _option_param(ctx, flag)
        if param is not None and ctx.get_parameter_source(param.name) is ParameterSource.DEFAULT_MAP \
                and ctx.meta.get("settings_file"):
            from_file.append(ctx.meta["settings_file"][0])
            return flag.split("/")[-1][2:]
        return flag

    out = _NAME.sub(option, text)
    if from_file and not out.startswith("--settings "):
        out = f"--settings {from_file[0]}: {out}"
    return out


def as_keys(text: str) -> str:
    """``text`` with every setting name replaced by its key in a campaign or settings file (``slip``)."""
    return _NAME.sub(lambda m: SETTING_OPTIONS[m.group(1)].split("/")[-1][2:]
                     if m.group(1) in SETTING_OPTIONS else m.group(1), text)


def setting_keys(text: str) -> list[str]:
    """The file keys (``slip``) of the settings ``text`` names, in order."""
    return [SETTING_OPTIONS[m.group(1)].split("/")[-1][2:] for m in _NAME.finditer(text)
            if m.group(1) in SETTING_OPTIONS]
