"""Commands that read a run folder: ``risk``, ``export`` and ``brief``."""

from __future__ import annotations

from pathlib import Path

import click

from planner.cli import cli
from planner.cli.plan_commands import float_list

run_argument = click.argument("run", type=click.Path(path_type=str))


@cli.command()
@run_argument
@click.option("--format", "fmt", type=click.Choice(["text", "csv", "json", "markdown"]), default="text",
              show_default=True, help="Table format.")
@click.option("--noise", "noises", default=None,
              help="Execution noise levels, comma-separated (default: the run's).")
@click.option("--drift-scale", "drift_scales", default=None,
              help="Drift scales, comma-separated (default: the run's).")
@click.option("--budget", type=int, default=None, metavar="MOVES",
              help="Also report risk within this many moves, and P(timeout).")
@click.option("--rollouts", type=int, default=None,
              help="Monte Carlo rollouts per row (default: the run's; 0 = none).")
@click.option("--policy", "policies", default="cautious,shortest", show_default=True,
              help="Policies, comma-separated: cautious, shortest, 'exact on-policy', 'exact optimal'.")
@click.option("--seed", type=int, default=None, help="Seed of the rollouts (default: from the run's manifest).")
def risk(run, fmt, noises, drift_scales, budget, rollouts, policies, seed):
    """Print the risk table of the policies in run folder RUN.

    Exact probabilities from the absorbing Markov chain of each policy executed with
    noise (greedy, or a uniformly random move with probability epsilon) under each
    drift scale, with Monte Carlo estimates and Wilson 95% intervals beside them; a '!'
    marks a figure outside its interval.
    """
    from planner.risk import format_table
    from planner.runfolder import check_counts, check_seed, load_run, rebuild_grid, run_risk

    check_seed(seed)
    loaded = load_run(run)
    s = loaded.settings
    noise_levels = s.noises if noises is None else float_list(noises, "--noise")
    scales = s.drift_scales if drift_scales is None else float_list(drift_scales, "--drift-scale")
    for n in noise_levels:
        if not 0.0 <= n < 1.0:
            raise click.BadParameter(f"{n:g} is not in [0, 1)", param_hint="--noise")
    for m in scales:
        if not m >= 0.0:
            raise click.BadParameter(f"{m:g} is negative", param_hint="--drift-scale")
    if budget is not None and budget < 1:
        raise click.BadParameter(f"{budget} is not a whole number of moves >= 1", param_hint="--budget")
    n_rollouts = s.rollouts if rollouts is None else rollouts
    if n_rollouts < 0:
        raise click.BadParameter(f"{n_rollouts} is negative", param_hint="--rollouts")
    check_counts(rollouts=n_rollouts, budget=budget, noise=len(noise_levels), drift_scales=len(scales))
    names = tuple(p.strip() for p in policies.split(",") if p.strip())
    _, grid = rebuild_grid(loaded)
    rows = run_risk(loaded, grid, noises=noise_levels, drift_scales=scales, budget=budget, rollouts=n_rollouts,
                    seed=seed, policies=names)
    click.echo(format_table(rows, fmt), nl=False)


@cli.command()
@run_argument
@click.option("--format", "fmt", type=click.Choice(["geojson", "csv", "gpx"]), default="geojson",
              show_default=True, help="Waypoint file format.")
@click.option("--policy", type=click.Choice(["cautious", "shortest", "both"]), default="both", show_default=True,
              help="Which policy's route.")
@click.option("--alt-m", type=float, default=None, metavar="M",
              help="Constant altitude above ground for aerial simulators (metres).")
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False, path_type=str),
              help="File to write (CSV with --policy both writes FILE-cautious.csv and FILE-shortest.csv).")
def export(run, fmt, policy, alt_m, output):
    """Write the waypoints of run folder RUN for a simulator.

    GeoJSON (RFC 7946, lon/lat), CSV or GPX 1.1. Every file states that it is for
    simulation only and not approved for field operation.
    """
    from planner.export import refuse_run_folder_target, write_csv, write_geojson, write_gpx
    from planner.runfolder import load_run, read_lock, rebuild, run_routes

    out = Path(output)
    targets = [out] if fmt != "csv" or policy != "both" else [
        out.with_name(f"{out.stem}-{n}{out.suffix or '.csv'}") for n in ("cautious", "shortest")]
    for target in targets:
        refuse_run_folder_target(target, "-o/--output")
    click.get_current_context().with_resource(read_lock(run))
    loaded = load_run(run)
    site, grid, model = rebuild(loaded)
    routes = run_routes(loaded, site, grid, model)
    chosen = [routes[n] for n in (("cautious", "shortest") if policy == "both" else (policy,))]
    written = []
    if fmt == "geojson":
        written.append(write_geojson(chosen if len(chosen) > 1 else chosen[0], out, site=site, alt_m=alt_m))
    elif fmt == "gpx":
        written.append(write_gpx(chosen, out, alt_m=alt_m))
    elif len(chosen) == 1:
        written.append(write_csv(chosen[0], out, alt_m=alt_m))
    else:
        for r in chosen:
            written.append(write_csv(r, out.with_name(f"{out.stem}-{r.name}{out.suffix or '.csv'}"), alt_m=alt_m))
    for path in written:
        click.echo(f"wrote {path} (simulation only)")


@cli.command()
@run_argument
def brief(run):
    """Render the briefing of run folder RUN again (brief.html and brief.pdf).

    The briefing is rebuilt from the run's manifest, risk table, figures and policies;
    the manifest's file hashes are updated to match.
    """
    from planner.runfolder import rewrite_brief

    html_path, pdf_path = rewrite_brief(run)
    click.echo(f"wrote {html_path} and {pdf_path}")
