"""``veerwise plan``: the main job, from a site file to a complete run folder."""

from __future__ import annotations

import json
import math
import sys
import time
from pathlib import Path

import click

from planner.cli import cli
from planner.cli.options import (
    SectionedCommand,
    dynamics_options,
    float_list,
    force_option,
    grid_options,
    learn_options,
    number,
    risk_budget_options,
    risk_table_options,
    run_argument,
    site_options,
)
from planner.cli.settings_file import settings_option
from planner.cli.site_commands import load_site_and_spec, make_dynamics
from planner.errors import Interrupted

#: ``-q``: no progress display (it is drawn only on a terminal anyway).
quiet_option = click.option("--quiet", "-q", is_flag=True, help="No progress display.")


def progress_console(quiet: bool):
    """The terminal to draw progress on (stderr), or None: ``-q``, or stderr is not a terminal."""
    if quiet or not sys.stderr.isatty():
        return None
    from rich.console import Console

    return Console(stderr=True)


def default_episodes(n_active: int) -> int:
    """Episodes per seed sized from the grid: 50 per usable cell, 20,000 to 500,000.

    Measured on the demo sites (about 5,000-6,000 usable cells): SARSA reaches 98%
    agreement with its exact reference at 200,000-250,000 episodes with step 0.1.
    """
    return int(min(500_000, max(20_000, 50 * n_active)))


#: Default ``--max-sweeps``: room for SARSA, which on the demo sites meets its risk
#: verdict after 2,048 to 4,096 sweeps (Q-learning after 64 or fewer).
DEFAULT_MAX_SWEEPS = 8192

def plan_settings(p: dict, loaded, spec, labelled, **given):
    """The :class:`PlanSettings` of ``plan``'s parsed parameters ``p`` (by name).

    For the loaded site, its grid settings and its grid; ``given`` sets fields directly
    (``seed=None``). ``plan`` and ``campaign`` both build their settings here.
    """
    from planner.learn import LearnSettings
    from planner.motion import travel_budget_m
    from planner.settings import PlanSettings

    dynamics = make_dynamics(p["n_actions"], p["slip"], p["stall"], p["drift_scale"], p["edge"], p["penalty_m"],
                             p["move_m"], loaded, spec)
    episodes = p["episodes"]
    if episodes is None:
        episodes = default_episodes(int((labelled.passable() & ~labelled.goal).sum()))
    learn = LearnSettings(epsilon=p["epsilon"], step_size=p["step_size"], step_decay=p["step_decay"],
                          gamma=p["gamma"], episodes=episodes, max_steps=p["max_steps"], n_seeds=p["n_seeds"],
                          start_mode=p["start_mode"], q_init=p["q_init"], max_sweeps=p["max_sweeps"])
    fields = dict(
        grid=spec, dynamics=dynamics, learn=learn, noises=float_list(p["noises"], "PlanSettings.noises"),
        drift_scales=float_list(p["drift_scales"], "PlanSettings.drift_scales"),
        budget_m=travel_budget_m(p["budget_m"], p["budget_min"], p["speed_mps"]), budget_min=p["budget_min"],
        speed_mps=p["speed_mps"], rollouts=p["rollouts"], seed=p["seed"], crs=p["crs"], fix=p["fix"],
        max_bytes=p["max_bytes"], alt_m=p["alt_m"], tie_m=p["tie_m"], cautious_schedule=p["cautious_schedule"],
        shortest_schedule=p["shortest_schedule"], grid_check=p["grid_check"], grid_levels=p["grid_levels"],
        risk_budget=p["risk_budget"], budget_set_by=p["budget_set_by"],
    )
    return PlanSettings(**{**fields, **given})


#: Exit code of ``plan --strict`` when the run was written but is not ready to sign.
EXIT_NOT_READY = 3


@cli.command(cls=SectionedCommand)
@click.argument("site", nargs=-1, type=click.Path(dir_okay=False, path_type=str))
@run_argument
@force_option
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON instead of text.")
@click.option("--strict", is_flag=True,
              help=f"Exit with code {EXIT_NOT_READY} (after writing the run) when any policy is not converged or "
                   "its training runs disagree on the route: for scripted campaigns and CI.")
@click.option("--quiet", "-q", is_flag=True, help="No progress display.")
@settings_option
@site_options
@grid_options
@dynamics_options
@learn_options
@risk_table_options
@risk_budget_options
@click.option("--alt-m", type=number(), default=None, metavar="M",
              help="Constant altitude above ground written into the waypoint files (aerial simulators).")
@click.option("--tie-m", type=number(), default=0.01, show_default=True, metavar="M",
              help="Actions within this many metres-equivalent of the best are equally good; among them the "
                   "safest is taken (must stay below the shortest move).")
@click.option("--cautious-schedule", type=click.Choice(["sweeps", "episodes"]), default="sweeps", show_default=True,
              help="How SARSA samples: sweeps over every state-action pair, the next action drawn from its "
                   "epsilon-greedy policy (stopping when its risk verdict passes), or episodes from the start.")
@click.option("--shortest-schedule", type=click.Choice(["sweeps", "episodes"]), default="sweeps", show_default=True,
              help="How Q-learning samples: sweeps over every state-action pair (stopping when its risk verdict "
                   "passes), or episodes from the start.")
@click.option("--max-sweeps", type=int, metavar="N", default=DEFAULT_MAX_SWEEPS,
              show_default=True, help="Update budget of the sweeps schedule, in sweeps per training run (checks "
                                      "of the risk verdict after 4, 8, 16, ... sweeps, then every 25% more, stop it earlier).")
@click.option("--grid-check/--no-grid-check", "grid_check", default=True, show_default=True,
              help="Re-evaluate each delivered policy on a grid of half the cell (same move length) and report "
                   "both figures.")
@click.option("--grid-levels", "grid_levels", type=int, default=2, show_default=True,
              help="Grids of the check: 2 (the cell and half the cell) or 3 (also a quarter: an observed order "
                   "and an error estimate by Richardson extrapolation).")
def plan(site, run, force, as_json, strict, quiet, crs, fix, max_bytes, cell_m, hazard_overlap, boundary_cover,
         max_cells, n_actions, move_m, slip, stall, drift_scale, edge, penalty_m, epsilon, step_size, step_decay,
         gamma, episodes, max_steps, n_seeds, start_mode, q_init, seed, noises, drift_scales, budget_m, budget_min,
         speed_mps, rollouts, alt_m, tie_m, cautious_schedule, shortest_schedule, max_sweeps, grid_check,
         grid_levels, risk_budget, budget_set_by):
    """Plan the cautious and the shortest route across SITE and write the run folder RUN.

    SITE is one or more site files (GeoJSON, or with the gis extra any vector format
    GDAL reads), merged into one site; the run folder keeps the merged site as
    site.geojson and the manifest hashes every file.

    With --risk-budget P, a third route too: the shortest whose exact P(incident) is at
    most P (the within-budget route, named "budget" in files), the trade-off curve
    between length and risk, and for every route where its risk comes from (P(incident)
    by leg, the likeliest failure paths).

    Builds the stochastic grid model, learns the cautious policy with SARSA and the
    shortest with Q-learning, checks both against exact value iteration, computes the
    risk table (exact, with a Monte Carlo cross-check) over noise levels and drift
    scales, and writes manifest.json, policies.npz, waypoint files (GeoJSON, CSV),
    risk.csv/json, figures and the briefing. The folder appears only when complete.

    For simulation and review only: not approved for field operation.

    \b
    Examples:
      veerwise plan maps/ground-yard.geojson run-yard --root-seed 1
      veerwise plan maps/drone-range.geojson run-wind --plan-drift 1.5 --table-drifts 1,2,3
      veerwise plan site.geojson run-ci --training-runs 4 --strict --json
      veerwise plan site.geojson run-16 --settings yard.toml --headings 16
      veerwise plan run-yard/site.geojson run-again --settings run-yard/manifest.json
      veerwise plan maps/drone-range.geojson run-budget --risk-budget 1e-3 --budget-set-by "A. Reviewer, range safety"
    """
    from planner.grid import rasterise
    from planner.pipeline import compute_plan
    from planner.progress import Progress
    from planner.runfolder import write_run
    from planner.transactions import check_out, run_lock, stop_on_sigterm

    started = time.perf_counter()
    if not site:
        raise click.UsageError(f"give one or more site files, then the run folder (got only {run!r})")
    if budget_set_by is not None and risk_budget is None:
        raise click.BadParameter("needs --risk-budget", param_hint="--budget-set-by")
    check_out(run, force=force)
    # Held until the command ends: a second plan to the same folder is refused at once.
    click.get_current_context().with_resource(run_lock(run))
    check_out(run, force=force)
    loaded, spec = load_site_and_spec(site, crs, fix, max_bytes, cell_m, hazard_overlap, boundary_cover,
                                      max_cells)
    settings_file, settings_sha256, made_from = click.get_current_context().meta.get("settings_file",
                                                                                (None, None, None))
    if made_from is not None and made_from != loaded.sha256:
        click.echo(f"veerwise: note: {' + '.join(site)} is not the site file the run in {settings_file} was made from "
                   "(its hash differs); the settings are taken all the same", err=True)
    labelled = rasterise(loaded, spec)
    settings = plan_settings(click.get_current_context().params, loaded, spec, labelled,
                             settings_file=settings_file, settings_sha256=settings_sha256)
    with stop_on_sigterm(), Progress(progress_console(quiet)) as progress:
        try:
            result = compute_plan(site, settings, progress, site=loaded, grid=labelled)
        except KeyboardInterrupt as err:
            raise Interrupted(f"stopped while planning (before writing); nothing was written to {run}") from err
        write_run(result, settings, site, run, force=force, progress=progress)
    summary = plan_summary(result, settings, run, time.perf_counter() - started)
    click.echo(json.dumps(_plain(summary), indent=2, sort_keys=True, allow_nan=False) if as_json
               else format_plan_summary(summary))
    from planner.brief_page import pdf_unavailable

    if pdf_unavailable() is not None:
        click.echo(f"veerwise: note: {pdf_unavailable()}", err=True)
    if strict and not summary["ready_to_sign"]:
        raise click.exceptions.Exit(EXIT_NOT_READY)


def format_grid_check(checks, name) -> str:
    """The half-cell figure beside the reported one: '; at half cell (2.25 m) 1.3% (+8%)'."""
    from planner.risk import format_prob
    from planner.risk_table import three_level_words

    check = next((c for c in checks if c.policy == name), None)
    if check is None:
        return ""
    if check.skipped:
        return f"; half-cell check skipped: {check.skipped}"
    rel = f"{100 * check.relative:+.0f}%" if check.relative is not None else f"{check.difference:+.1e}"
    flag = ", DIFFERS BEYOND TOLERANCE: refine --cell" if check.flagged else ""
    third = three_level_words(check.as_dict())
    return (f"; at half cell ({check.fine_cell_m:g} m) {format_prob(check.p_incident_fine)} ({rel}{flag})"
            + (f"; {third}" if third else ""))


def plan_summary(result, settings, out, elapsed_s: float) -> dict:
    """What ``plan`` reports when it is done, as plain data (``--json`` prints it as is)."""
    from planner.brief_headline import compare_routes, route_figures, seeds_banner
    from planner.pipeline import METHOD_NAMES
    from planner.risk import find_row

    eps, base = settings.learn.epsilon, settings.dynamics.drift_scale
    figures = {}
    for name in ("cautious", "shortest"):
        route, conv = result.routes[name], result.convergence[name]
        record = {"converged": conv.converged, "message": conv.message, "n_seeds": conv.n_seeds,
                  "seed_routes_matching": conv.seed_routes_matching,
                  "p_incident_seeds": [float(p) for p in result.seed_p_incident.get(name, ())]}
        figures[name] = {**route_figures(name, route, record, find_row(result.risk_rows, name, eps, base)),
                         "waypoint_length_m": route.waypoint_length_m, "moves": route.n_moves,
                         "delivered": f"learned ({METHOD_NAMES[result.learned[name].method]})"}
    comparison, _ = compare_routes(figures["cautious"], figures["shortest"])
    lon, lat = result.site.centre_lonlat
    width, height = result.site.extent_m
    banners = [seeds_banner(x) for x in figures.values() if x["seeds_disagree"]]
    warnings = list(result.site.warnings) + list(result.grid.warnings) + list(result.model.warnings)
    policies = {name: {
        "length_m": x["length_m"], "waypoint_length_m": x["waypoint_length_m"], "moves": x["moves"],
        "reached_goal": x["reached_goal"], "ends": x["ends"], "p_incident": x["p_incident_value"],
        "p_incident_seeds_range": [x["p_incident_lo"], x["p_incident_hi"]], "converged": x["converged"],
        "message": x["message"], "seed_routes_matching": x["seed_routes_matching"], "n_seeds": x["n_seeds"],
        "seeds_disagree": x["seeds_disagree"], "delivered": x["delivered"],
        "grid_check": format_grid_check(result.grid_checks, name).removeprefix("; "),
        "text": {"p_incident": x["p_incident"], "p_incident_seeds_range": x["p_incident_range"]},
    } for name, x in figures.items()}
    budget = None
    if result.budget_record is not None:
        from planner.budget_plan import budget_statement
        from planner.risk import format_prob

        route, record = result.routes["budget"], result.budget_record
        row = find_row(result.risk_rows, "budget", eps, base)
        policies["budget"] = {
            "length_m": route.length_m, "waypoint_length_m": route.waypoint_length_m, "moves": route.n_moves,
            "reached_goal": route.reached_goal, "ends": figures_ends(route), "p_incident": row.p_incident,
            "delivered": "exact (risk-budget search)", "meets_budget": record["met"],
            "grid_check": format_grid_check(result.grid_checks, "budget").removeprefix("; "),
            "text": {"p_incident": format_prob(row.p_incident)},
        }
        budget = {**{k: v for k, v in record.items() if k != "curve"}, "statement": budget_statement(record, format_prob),
                  "curve": record["curve"]}
    return {
        "site": result.site.name, "run_folder": str(out), "briefing": str(Path(out) / "brief.html"),
        "notice": "for simulation and review only; not approved for field operation",
        "centre": {"lat": lat, "lon": lon}, "extent_m": {"east": width, "north": height},
        "noise": eps, "drift_scale": base, "policies": policies, "comparison": comparison,
        "banners": banners, "warnings": warnings, "elapsed_s": round(elapsed_s, 1), "risk_budget": budget,
        "ready_to_sign": all(x["converged"] and not x["seeds_disagree"] for x in figures.values()),
    }


def figures_ends(route) -> str:
    """How a nominal route ends, as the summary says it."""
    from planner.brief_headline import route_ends as _ends

    return _ends(route)


def _plain(value):
    """JSON-ready data: NaN and infinities become null."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


#: The plan summary stays narrower than this many columns.
SUMMARY_WIDTH = 99


def format_plan_summary(summary: dict) -> str:
    """The summary ``plan`` prints: under 100 columns, warnings and banners on lines of their own."""
    import textwrap

    from planner.notation import hemisphere

    def wrapped(text, first, rest="              "):
        # "1 in 480" is one figure: never broken across lines
        kept = text.replace("1 in ", "1\u00a0in\u00a0")
        return [line.replace("\u00a0", " ") for line in textwrap.wrap(
            kept, SUMMARY_WIDTH, initial_indent=first, subsequent_indent=rest, break_on_hyphens=False,
            break_long_words=False)]

    s = summary
    lines = wrapped(f"{s['site']}: run folder {s['run_folder']} (for simulation and review only)", "", "  ")
    lines += wrapped(f"{hemisphere(s['centre']['lat'], s['centre']['lon'])} (WGS 84); "
                     f"{s['extent_m']['east']:.0f} m east-west x {s['extent_m']['north']:.0f} m north-south",
                     "site centre   ")
    for name, x in s["policies"].items():
        end = "reaches the goal" if x["reached_goal"] else f"ENDS {x['ends']}"
        lines.append(f"{name:<13} {x['length_m']:.1f} m ({x['waypoint_length_m']:.1f} m by waypoints), "
                     f"{x['moves']} moves, {end}")
        if name == "budget":
            lines += wrapped(f"P(incident) {x['text']['p_incident']} at noise {s['noise']:g}; the within-budget "
                             "route" + ("" if x["meets_budget"] else ", which does NOT meet the budget"), " " * 14)
            if x["grid_check"]:
                lines += wrapped(x["grid_check"], " " * 14)
            lines += wrapped(s["risk_budget"]["statement"], " " * 14)
            continue
        lines += wrapped(f"P(incident) {x['text']['p_incident']} at noise {s['noise']:g}; over the "
                         f"{x['n_seeds']} training runs {x['text']['p_incident_seeds_range']}", " " * 14)
        if x["grid_check"]:
            lines += wrapped(x["grid_check"], " " * 14)
        lines += wrapped(f"delivered: {x['delivered']}; {x['message']}", " " * 14)
    if s["comparison"]:
        lines += wrapped(s["comparison"], "comparison    ")
    lines.append(f"briefing      {s['briefing']}")
    lines.append(f"elapsed       {s['elapsed_s']:.1f} s")
    for banner in s["banners"]:
        lines += wrapped(banner, "! ", "  ")
    if s["warnings"]:
        lines.append(f"warnings      {len(s['warnings'])}")
        for w in s["warnings"]:
            lines += wrapped(w, "  - ", "    ")
    else:
        lines.append("warnings      none")
    return "\n".join(lines)
