"""``veerwise plan``: the main job, from a site file to a complete run folder."""

from __future__ import annotations

import sys

import click

from planner.cli import cli
from planner.cli.options import dynamics_options, grid_options, site_argument, site_options
from planner.cli.site_commands import load_site_and_spec, make_dynamics
from planner.errors import Interrupted


def float_list(text: str, option: str) -> tuple[float, ...]:
    """Parse "0,0.05,0.1" into floats, naming the option when it is not that."""
    try:
        values = tuple(float(v) for v in text.split(",") if v.strip())
    except ValueError as err:
        raise click.BadParameter(f"{text!r} is not a comma-separated list of numbers", param_hint=option) from err
    if not values:
        raise click.BadParameter("needs at least one number", param_hint=option)
    return values


def learn_options(f):
    """Options of the two learners."""
    f = click.option("--epsilon", type=float, default=0.1, show_default=True,
                     help="Execution noise the cautious policy is trained for (share of random moves).")(f)
    f = click.option("--step-size", type=float, default=0.1, show_default=True, help="Constant step size.")(f)
    f = click.option("--step-decay", type=float, default=None, metavar="W",
                     help="Use step size 1/n(s,a)^W instead of a constant (0.5 < W <= 1).")(f)
    f = click.option("--gamma", type=float, default=1.0, show_default=True, help="Discount (1 = none).")(f)
    f = click.option("--episodes", type=int, default=None,
                     help="Training episodes per seed (default: sized from the grid).")(f)
    f = click.option("--max-steps", type=int, default=None,
                     help="Episode step cap (default: 10 x the fewest moves to the goal).")(f)
    f = click.option("--seeds", "n_seeds", type=int, default=8, show_default=True,
                     help="Independent training runs per learner.")(f)
    f = click.option("--start-mode", type=click.Choice(["start", "explore"]), default="explore",
                     show_default=True, help="Episodes begin at the start, or also near the start-goal corridor.")(f)
    f = click.option("--q-init", type=click.Choice(["heuristic", "zeros"]), default="heuristic", show_default=True,
                     help="Initial Q: from a shortest-path heuristic, or zeros.")(f)
    f = click.option("--seed", type=int, default=None,
                     help="Root seed of the run (default: fresh entropy, recorded in the manifest).")(f)
    return f


def risk_options(f):
    f = click.option("--noise", "noises", default="0,0.05,0.1,0.2", show_default=True,
                     help="Execution noise levels of the risk table (comma-separated).")(f)
    f = click.option("--drift-scales", default="1,1.5,2", show_default=True,
                     help="Drift scales of the risk table (comma-separated; 2 = wind twice the forecast).")(f)
    f = click.option("--budget", type=int, default=None, metavar="MOVES",
                     help="Also report risk within this many moves, and P(timeout).")(f)
    f = click.option("--rollouts", type=int, default=20000, show_default=True,
                     help="Monte Carlo rollouts per row of the risk table (0 = none).")(f)
    return f


def default_episodes(n_active: int) -> int:
    """Episodes per seed sized from the grid: 50 per usable cell, 20,000 to 500,000.

    Measured on the demo sites (about 5,000-6,000 usable cells): SARSA reaches 98%
    agreement with its exact reference at 200,000-250,000 episodes with step 0.1.
    """
    return int(min(500_000, max(20_000, 50 * n_active)))


@cli.command()
@site_argument
@click.option("--out", "-o", "out", required=True, type=click.Path(file_okay=False, path_type=str),
              help="Run folder to create.")
@click.option("--force", is_flag=True, help="Replace an existing run folder (only once the new one is complete).")
@site_options
@grid_options
@dynamics_options
@learn_options
@risk_options
@click.option("--alt-m", type=float, default=None, metavar="M",
              help="Constant altitude above ground written into the waypoint files (aerial simulators).")
@click.option("--tie-m", type=float, default=0.01, show_default=True, metavar="M",
              help="Actions within this many metres-equivalent of the best are equally good; among them the "
                   "safest is taken (must stay below the shortest move).")
@click.option("--shortest-schedule", type=click.Choice(["sweeps", "episodes"]), default="sweeps", show_default=True,
              help="How Q-learning samples: sweeps over every state-action pair (stopping when its risk verdict "
                   "passes), or episodes from the start like SARSA.")
@click.option("--max-sweeps", type=click.IntRange(1, 1_000_000), default=512, show_default=True,
              help="Update budget of the sweeps schedule, in sweeps.")
@click.option("--quiet", "-q", is_flag=True, help="No progress display.")
def plan(site, out, force, crs, fix, max_bytes, cell_m, hazard_overlap, boundary_cover, max_cells, n_actions,
         slip, stall, drift_scale, edge, penalty_m, epsilon, step_size, step_decay, gamma, episodes, max_steps,
         n_seeds, start_mode, q_init, seed, noises, drift_scales, budget, rollouts, alt_m, tie_m, shortest_schedule,
         max_sweeps, quiet):
    """Plan the cautious and the shortest route across SITE and write the run folder OUT.

    Builds the stochastic grid model, learns the cautious policy with SARSA and the
    shortest with Q-learning, checks both against exact value iteration, computes the
    risk table (exact, with a Monte Carlo cross-check) over noise levels and drift
    scales, and writes manifest.json, policies.npz, waypoint files (GeoJSON, CSV),
    risk.csv/json, figures and the briefing. The folder appears only when complete.

    For simulation and review only: not approved for field operation.
    """
    from planner.grid import rasterise
    from planner.learn import LearnSettings
    from planner.runfolder import PlanSettings, Progress, check_out, compute_plan, run_lock, stop_on_sigterm, write_run

    check_out(out, force=force)
    # Held until the command ends: a second plan to the same folder is refused at once.
    click.get_current_context().with_resource(run_lock(out))
    check_out(out, force=force)
    loaded, spec = load_site_and_spec(site, crs, fix, max_bytes, cell_m, hazard_overlap, boundary_cover,
                                      max_cells)
    dynamics = make_dynamics(n_actions, slip, stall, drift_scale, edge, penalty_m)
    labelled = rasterise(loaded, spec)
    if episodes is None:
        episodes = default_episodes(int((labelled.passable() & ~labelled.goal).sum()))
    if alt_m is not None and not (0.0 <= alt_m <= 10_000.0):
        raise click.BadParameter(f"{alt_m:g} is not an altitude in [0, 10000] m", param_hint="--alt-m")
    learn = LearnSettings(epsilon=epsilon, step_size=step_size, step_decay=step_decay, gamma=gamma,
                          episodes=episodes, max_steps=max_steps, n_seeds=n_seeds, start_mode=start_mode,
                          q_init=q_init, max_sweeps=max_sweeps)
    settings = PlanSettings(grid=spec, dynamics=dynamics, learn=learn, noises=float_list(noises, "--noise"),
                            drift_scales=float_list(drift_scales, "--drift-scales"), budget=budget,
                            rollouts=rollouts, seed=seed, crs=crs, fix=fix, max_bytes=max_bytes, alt_m=alt_m,
                            tie_m=tie_m, shortest_schedule=shortest_schedule)
    show = not quiet and sys.stderr.isatty()
    progress = Progress(say=(lambda m: click.echo(m, err=True)) if show else None)
    with stop_on_sigterm():
        try:
            result = compute_plan(site, settings, progress, site=loaded, grid=labelled)
        except KeyboardInterrupt as err:
            raise Interrupted(f"stopped while planning (before writing); nothing was written to {out}") from err
        write_run(result, settings, site, out, force=force, progress=progress)
    click.echo(format_plan_summary(result, settings, out))


def format_plan_summary(result, settings, out) -> str:
    from planner.risk import find_row, format_prob
    from planner.runfolder import METHOD_NAMES

    eps = settings.learn.epsilon
    lines = [f"{result.site.name}: run folder {out} (for simulation and review only)"]
    for name in ("cautious", "shortest"):
        route, conv = result.routes[name], result.convergence[name]
        row = find_row(result.risk_rows, name, eps, 1.0)
        risk = f", P(incident) {format_prob(row.p_incident)} at noise {eps:g}" if row is not None else ""
        end = "reaches the goal" if route.reached_goal else f"ENDS AT {route.end_event.upper()}"
        lines.append(f"  {name:9s} {route.length_m:7.1f} m ({route.waypoint_length_m:.1f} m by waypoints), "
                     f"{route.n_moves:3d} moves, {end}{risk}")
        delivered = f"learned ({METHOD_NAMES[result.learned[name].method]})"
        lines.append(f"            delivered: {delivered}; {conv.message}")
    return "\n".join(lines)
