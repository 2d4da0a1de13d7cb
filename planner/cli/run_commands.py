"""Commands that read a run folder: ``risk``, ``export`` and ``brief``."""

from __future__ import annotations

from pathlib import Path

import click

from planner.cli import cli
from planner.cli.options import (
    SectionedCommand,
    finite,
    float_list,
    force_option,
    output_option,
    risk_table_options,
    run_argument,
)
from planner.cli.plan_commands import quiet_option

#: Waypoint formats ``export`` writes.
EXPORT_FORMATS = ("geojson", "csv", "gpx")


def risk_table_options_from_run(f):
    """The risk-table options with the run's own settings as defaults."""
    return risk_table_options(f, defaults_from_run=True)



@cli.command(cls=SectionedCommand)
@run_argument
@click.option("--format", "fmt", type=click.Choice(["text", "csv", "json", "markdown"]), default="text",
              show_default=True, help="Table format.")
@click.option("--details", is_flag=True,
              help="Text: follow each row with its zones' shares, entries, budget figures and Monte Carlo estimates.")
@click.option("--policy", "policies", default="cautious,shortest", show_default=True, metavar="LIST",
              help="Policies, comma-separated: cautious, shortest, 'exact on-policy', 'exact optimal'.")
@risk_table_options_from_run
@click.option("--rollout-seed", type=click.IntRange(0), default=None, metavar="N",
              show_default="spawned from the run's root seed", help="Seed of the Monte Carlo rollouts.")
def risk(run, fmt, details, policies, noises, drift_scales, budget_m, budget_min, speed_mps, rollouts,
         rollout_seed):
    """Print the risk table of the policies in run folder RUN.

    Exact probabilities from the absorbing Markov chain of each policy executed with
    noise (greedy, or a uniformly random move with probability epsilon) under each
    drift scale, with Monte Carlo estimates and their Clopper-Pearson 95% intervals beside them;
    a '!' marks an exact figure outside the Clopper-Pearson interval of its Monte Carlo
    count, at the level that keeps the whole table's checks at 95% together. Text
    prints one line per row.

    \b
    Examples:
      veerwise risk run-yard
      veerwise risk run-yard --table-drifts 1,2,3 --details
      veerwise risk run-yard --format csv > risk-again.csv
    """
    from planner.risk_table import format_table
    from planner.runfolder import check_counts, check_seed, load_run, rebuild_grid, run_risk

    check_seed(rollout_seed, "--rollout-seed")
    loaded = load_run(run)
    s = loaded.settings
    noise_levels = s.noises if noises is None else float_list(noises, "--table-noises", high=1.0)
    scales = s.drift_scales if drift_scales is None else float_list(drift_scales, "--table-drifts")
    n_rollouts = s.rollouts if rollouts is None else rollouts
    from planner.motion import travel_budget_m

    if budget_min is not None and speed_mps is None:
        speed_mps = s.speed_mps
    budget_m = travel_budget_m(budget_m, budget_min, speed_mps)
    check_counts(rollouts=n_rollouts, budget_m=budget_m, table_noises=len(noise_levels), table_drifts=len(scales))
    names = tuple(p.strip() for p in policies.split(",") if p.strip())
    _, grid = rebuild_grid(loaded)
    from planner.cli.plan_commands import progress_console
    from planner.runfolder import Progress

    with Progress(progress_console(False)) as progress, progress.task(
            "risk table (rows)", len(names) * len(noise_levels) * len(scales)) as report:
        rows = run_risk(loaded, grid, noises=noise_levels, drift_scales=scales, budget_m=budget_m,
                        rollouts=n_rollouts, seed=rollout_seed, policies=names, progress=report)
    click.echo(format_table(rows, fmt, details=details), nl=False)


@cli.command(cls=SectionedCommand)
@run_argument
@output_option("Waypoint file to write; its extension decides the format (.geojson or .json, .csv, .gpx). "
               "CSV holds one route: with --policy both it writes FILE's stem + -cautious.csv and -shortest.csv.")
@force_option
@click.option("--format", "fmt", type=click.Choice(EXPORT_FORMATS), default=None,
              show_default="from the extension of -o",
              help="Waypoint file format; refused when it does not match the extension of -o.")
@click.option("--policy", type=click.Choice(["cautious", "shortest", "both"]), default="both", show_default=True,
              help="Which policy's route.")
@click.option("--alt-m", type=finite(0, 10_000), default=None, metavar="M",
              help="Constant altitude above ground for aerial simulators (metres).")
def export(run, output, force, fmt, policy, alt_m):
    """Write the waypoints of run folder RUN for a simulator.

    GeoJSON (RFC 7946, lon/lat), CSV or GPX 1.1, chosen by the extension of -o. Every
    file states that it is for simulation only and not approved for field operation.
    An existing file is replaced only with --force.

    \b
    Examples:
      veerwise export run-yard -o routes.gpx --alt-m 30
      veerwise export run-yard -o cautious.geojson --policy cautious
    """
    from planner.export import (
        check_output,
        output_format,
        refuse_run_folder_target,
        write_csv,
        write_geojson,
        write_gpx,
    )
    from planner.runfolder import load_run, rebuild, run_routes
    from planner.transactions import read_lock

    out = Path(output)
    names = ("cautious", "shortest") if policy == "both" else (policy,)
    fmt = output_format(out, EXPORT_FORMATS, fmt=fmt)
    targets = ([out.with_name(f"{out.stem}-{n}{out.suffix}") for n in names] if fmt == "csv" and len(names) > 1
               else [out])
    for target in targets:
        refuse_run_folder_target(target, "-o/--output")
        check_output(target, EXPORT_FORMATS, fmt=fmt, force=force)
    click.get_current_context().with_resource(read_lock(run))
    loaded = load_run(run)
    site, grid, model = rebuild(loaded)
    routes = run_routes(loaded, site, grid, model)
    chosen = [routes[n] for n in names]
    written = []
    if fmt == "geojson":
        written.append(write_geojson(chosen if len(chosen) > 1 else chosen[0], out, site=site, alt_m=alt_m))
    elif fmt == "gpx":
        written.append(write_gpx(chosen, out, alt_m=alt_m))
    else:
        for r, target in zip(chosen, targets, strict=True):
            written.append(write_csv(r, target, alt_m=alt_m))
    for path in written:
        click.echo(f"wrote {path} (simulation only)")


@cli.command(cls=SectionedCommand)
@run_argument
@quiet_option
def brief(run, quiet):
    """Render the briefing of run folder RUN again (brief.html and brief.pdf).

    brief.pdf is printed from brief.html with WeasyPrint; where its system libraries
    (Pango) are missing, only brief.html is written and a note says what to install.

    The briefing is rebuilt from the run's manifest, risk table, figures and policies;
    the manifest's file hashes are updated to match.

    \b
    Example:
      veerwise brief run-yard
    """
    from planner.brief import pdf_unavailable
    from planner.cli.plan_commands import progress_console
    from planner.runfolder import Progress, rewrite_brief

    with Progress(progress_console(quiet)) as progress, progress.task("briefing (HTML, then PDF)"):
        html_path, pdf_path = rewrite_brief(run)
    click.echo(f"wrote {html_path} and {pdf_path}" if pdf_path else f"wrote {html_path}")
    if pdf_path is None:
        click.echo(f"veerwise: note: {pdf_unavailable()}", err=True)
