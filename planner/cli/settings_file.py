"""``plan --settings FILE``: the rarely changed options from a TOML file or a run's manifest.

A TOML settings file names ``plan``'s options by their long names without the dashes,
at the top level or in tables named after the help sections::

    [grid]
    cell = 4.5

    [vehicle-and-motion]
    headings = 16
    slip = 0.05

    [risk-table]
    table-noises = [0, 0.05, 0.1]

A run's ``manifest.json`` gives back the settings that run was made with, its root seed
included, so ``plan SITE RUN2 --settings RUN/manifest.json`` makes the same run again.
Options given on the command line override the file. The values go through the same
option types as typed ones, so one rule gives one message; a message names the file
and the key.
"""

from __future__ import annotations

import hashlib
import json
import math
import tomllib
from pathlib import Path

import click

from planner.cli.options import SECTIONS

#: Options a settings file cannot set: where the run goes and how it is shown, not what it is.
NOT_FROM_FILE = ("site", "run", "settings", "force", "as_json", "quiet", "strict")
#: The largest settings file read (a settings file is a few hundred bytes; a manifest a few kB).
MAX_SETTINGS_BYTES = 1_000_000


def _refuse(path, text: str) -> click.UsageError:
    """The one line a bad settings file gets: '--settings FILE: what is wrong'."""
    return click.UsageError(f"--settings {path}: {text}")


def section_key(title: str) -> str:
    """'Vehicle and motion' -> 'vehicle-and-motion': the TOML table of a help section."""
    return title.lower().replace(" ", "-")


def _option_names(command: click.Command) -> dict[str, click.Option]:
    """Long option name without dashes (``cell``, ``table-noises``) -> the option."""
    out = {}
    for param in command.params:
        if isinstance(param, click.Option) and param.name not in NOT_FROM_FILE:
            longs = [o for o in param.opts if o.startswith("--")]
            if longs:
                out[longs[0][2:]] = param
    return out


def _read_bytes(path: Path) -> bytes:
    try:
        if path.stat().st_size > MAX_SETTINGS_BYTES:
            raise _refuse(path, f"over {MAX_SETTINGS_BYTES:,} bytes; not a settings file")
        return path.read_bytes()
    except OSError as err:
        raise _refuse(path, f"{err.strerror or err}") from err


def values_from_toml(path: Path, data: bytes, command: click.Command) -> dict[str, object]:
    """Option values (long name without dashes -> value) from a TOML settings file."""
    try:
        table = tomllib.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as err:
        raise _refuse(path, f"not a TOML file ({err})") from err
    known = _option_names(command)
    sections = {section_key(title): set(names) for title, names in SECTIONS.items()}
    out: dict[str, object] = {}

    def take(key, value, where):
        if key not in known:
            refused = key in ("site", "run", "settings", "force", "json", "quiet", "strict")
            why = "is given on the command line only" if refused else "is not an option of plan"
            raise _refuse(path, f"{where}{key!r} {why}")
        if key in out:
            raise _refuse(path, f"{key!r} is given twice")
        out[key] = value

    for key, value in table.items():
        if isinstance(value, dict):
            if key not in sections:
                raise _refuse(path, f"table [{key}] is not a section of plan's options (sections: "
                                    f"{', '.join(sorted(sections))})")
            for inner, inner_value in value.items():
                if isinstance(inner_value, dict):
                    raise _refuse(path, f"[{key}.{inner}] nests too deep")
                if inner in known and known[inner].name not in sections[key]:
                    raise _refuse(path, f"{inner!r} belongs in another section than [{key}]")
                take(inner, inner_value, f"[{key}] ")
        else:
            take(key, value, "")
    return out


#: Where each option's value sits in a manifest's ``settings`` (a dotted path), by option name.
FROM_MANIFEST = {
    "crs": "crs", "fix": "fix", "max-bytes": "max_bytes",
    "cell": "grid.cell_m", "hazard-overlap": "grid.hazard_overlap", "boundary-cover": "grid.boundary_cover",
    "max-cells": "grid.max_cells",
    "headings": "dynamics.n_actions", "move-m": "dynamics.move_m", "slip": "dynamics.slip",
    "stall": "dynamics.stall", "plan-drift": "dynamics.drift_scale", "edge": "dynamics.edge",
    "penalty": "dynamics.hazard_penalty_m",
    "epsilon": "learn.epsilon", "step-size": "learn.step_size", "step-decay": "learn.step_decay",
    "gamma": "learn.gamma", "episodes": "learn.episodes", "max-steps": "learn.max_steps",
    "training-runs": "learn.n_seeds", "start-mode": "learn.start_mode", "q-init": "learn.q_init",
    "max-sweeps": "learn.max_sweeps",
    "table-noises": "noises", "table-drifts": "drift_scales", "budget-m": "budget_m", "budget-min": "budget_min",
    "speed-mps": "speed_mps", "rollouts": "rollouts", "alt-m": "alt_m", "tie-m": "tie_m",
    "cautious-schedule": "cautious_schedule", "shortest-schedule": "shortest_schedule", "grid-check": "grid_check",
    "grid-levels": "grid_levels", "risk-budget": "risk_budget", "budget-set-by": "budget_set_by",
}
#: Recorded settings no option sets; a manifest may hold them only at these values.
FIXED_IN_MANIFEST = {
    "episodes_shortest": None, "convergence_threshold": 0.95, "learn.sweep_horizon": None,
    "learn.schedule": "episodes", "dynamics.step_cost": "length",
}
#: Recorded settings that say where the settings came from, not what they are.
PROVENANCE = ("seed", "settings_file", "settings_sha256")


def _walk(record: dict, prefix: str = ""):
    for key, value in record.items():
        if isinstance(value, dict):
            yield from _walk(value, f"{prefix}{key}.")
        else:
            yield f"{prefix}{key}", value


def values_from_manifest(path: Path, data: bytes, command: click.Command) -> tuple[dict[str, object], str | None]:
    """Option values from a run's manifest, and the site file's hash the run was made from."""
    try:
        manifest = json.loads(data.decode("utf-8"))
        settings = manifest["settings"]
        entropy = manifest["seeds"]["entropy"]
    except (UnicodeDecodeError, json.JSONDecodeError, KeyError, TypeError) as err:
        raise _refuse(path, f"not a veerwise manifest with settings and seeds ({err})") from err
    flat = dict(_walk(settings)) if isinstance(settings, dict) else {}
    known = _option_names(command)
    by_path = {where: name for name, where in FROM_MANIFEST.items()}
    out: dict[str, object] = {}
    for where, value in flat.items():
        if where in PROVENANCE:
            continue
        name = by_path.get(where)
        if name is None:
            fixed = FIXED_IN_MANIFEST.get(where, ...)
            if value != fixed:
                raise _refuse(path, f"setting {where} = {value!r} has no plan option, so this "
                                    "run cannot be made again from its manifest")
            continue
        if name not in known or value is None:
            continue
        if name == "budget-m" and flat.get("budget_min") is not None:
            continue  # the time budget is given back as minutes and speed
        out[name] = value
    out["root-seed"] = int(entropy) if str(entropy).isdigit() else entropy
    site = manifest["input"].get("sha256") if isinstance(manifest.get("input"), dict) else None
    return out, site


def _as_option_value(name: str, param: click.Option, value):
    """A TOML or JSON value as the option would take it from the command line."""
    if isinstance(value, list):
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
            raise ValueError("a list must hold numbers only")
        return ",".join(repr(float(v)) if isinstance(v, float) else str(v) for v in value)
    if isinstance(value, float) and not math.isfinite(value):
        raise ValueError(f"{value!r} is not a finite number")
    return value


def _check(ctx: click.Context, path: Path, values: dict[str, object], command: click.Command) -> dict[str, object]:
    """Each value converted by its option's own type, a failure naming the file and the key."""
    known = _option_names(command)
    default_map = {}
    for name, value in values.items():
        try:
            default_map[known[name].name] = option_value(ctx, name, known[name], value)
        except ValueError as err:
            raise _refuse(path, f"{name} = {value!r}: {err}") from err
    return default_map


def option_value(ctx: click.Context, name: str, param: click.Option, value):
    """A value from a file, as the option takes it from the command line, checked by the option's own type.

    Raises ``ValueError`` with the option type's message when the value does not fit.
    """
    if param.is_flag and not isinstance(value, bool):
        raise ValueError(f"{value!r} is not true or false")
    if not param.is_flag and isinstance(value, bool):
        raise ValueError(f"{value!r} is not a value of --{name}")
    value = _as_option_value(name, param, value)
    try:
        param.type_cast_value(ctx, value)
    except click.BadParameter as err:
        raise ValueError(err.message) from err
    return value


def load_settings(ctx: click.Context, param, value):
    """``--settings`` callback: fill ``ctx.default_map`` from the file before the other options are read."""
    if value is None:
        return None
    path = Path(value)
    data = _read_bytes(path)
    command = ctx.command
    if path.suffix.lower() == ".json":
        values, site_sha256 = values_from_manifest(path, data, command)
    else:
        values, site_sha256 = values_from_toml(path, data, command), None
    ctx.default_map = {**(ctx.default_map or {}), **_check(ctx, path, values, command)}
    ctx.meta["settings_file"] = (str(path), hashlib.sha256(data).hexdigest(), site_sha256)
    return value


settings_option = click.option(
    "--settings", type=click.Path(dir_okay=False, path_type=str), default=None, metavar="FILE",
    is_eager=True, expose_value=False, callback=load_settings,
    help="Read options from a TOML settings file, or from a run's manifest.json to make that run again "
         "(its root seed included); options given here override the file.")
