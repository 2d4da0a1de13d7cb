"""Commands that read a run folder: ``risk``, ``export`` and ``brief``."""

from __future__ import annotations

from pathlib import Path

import click

from planner.cli import cli
from planner.cli.options import (
    SectionedCommand,
    float_list,
    force_option,
    number,
    output_option,
    risk_table_options,
    run_argument,
)
from planner.cli.plan_commands import quiet_option

#: File formats ``export`` writes.
EXPORT_FORMATS = ("geojson", "csv", "gpx", "geotiff")


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
@click.option("--rollout-seed", type=int, default=None, metavar="N",
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
    from planner import checks
    from planner.risk_table import format_table
    from planner.runload import load_run, rebuild_grid, run_risk
    from planner.settings import check_counts

    checks.seed(rollout_seed, "run_risk.seed")
    loaded = load_run(run)
    s = loaded.settings
    noise_levels = s.noises if noises is None else float_list(noises, "PlanSettings.noises")
    scales = s.drift_scales if drift_scales is None else float_list(drift_scales, "PlanSettings.drift_scales")
    n_rollouts = s.rollouts if rollouts is None else rollouts
    from planner.motion import travel_budget_m

    if budget_min is not None and speed_mps is None:
        speed_mps = s.speed_mps
    budget_m = travel_budget_m(budget_m, budget_min, speed_mps)
    check_counts({"PlanSettings.rollouts": n_rollouts, "PlanSettings.budget_m": budget_m,
                  "PlanSettings.noises": len(noise_levels), "PlanSettings.drift_scales": len(scales)})
    names = tuple(p.strip() for p in policies.split(",") if p.strip())
    _, grid = rebuild_grid(loaded)
    from planner.cli.plan_commands import progress_console
    from planner.progress import Progress

    with Progress(progress_console(False)) as progress, progress.task(
            "risk table (rows)", len(names) * len(noise_levels) * len(scales)) as report:
        rows = run_risk(loaded, grid, noises=noise_levels, drift_scales=scales, budget_m=budget_m,
                        rollouts=n_rollouts, seed=rollout_seed, policies=names, progress=report)
    click.echo(format_table(rows, fmt, details=details), nl=False)


@cli.command(cls=SectionedCommand)
@run_argument
@output_option("File to write; its extension decides the format: .geojson or .json, .csv, .gpx (waypoints), "
               ".tif or .tiff (GeoTIFF of the risk maps and cell labels, gis extra). CSV holds one route: with "
               "--policy both it writes FILE's stem + -cautious.csv and -shortest.csv (with all, also -budget.csv), "
               "each with a .txt sidecar.")
@force_option
@click.option("--format", "fmt", type=click.Choice(EXPORT_FORMATS), default=None,
              show_default="from the extension of -o",
              help="File format; refused when it does not match the extension of -o.")
@click.option("--contents", type=click.Choice(["waypoints", "hazard-cells"]), default="waypoints",
              show_default=True,
              help="GeoJSON only: the routes' waypoints, or the cells the grid treats as hazard (polygons).")
@click.option("--policy", type=click.Choice(["cautious", "shortest", "budget", "both", "all"]), default="both",
              show_default=True,
              help="Which policy's route (or risk map): both = cautious and shortest; budget = the within-budget "
                   "route of a run planned with --risk-budget; all = every route of the run.")
@click.option("--alt-m", type=number(), default=None, metavar="M",
              help="Constant altitude above ground for aerial simulators (metres), written in its own field.")
@click.option("--ground-elev-m", type=number(), default=None, metavar="M",
              help="Ground elevation of the whole site (metres, in --vertical-datum): fills GPX <ele> and the "
                   "GeoJSON third coordinate with ground + --alt-m.")
@click.option("--dem", type=click.Path(dir_okay=False, path_type=str), default=None, metavar="FILE",
              help="DEM GeoTIFF sampled at each waypoint for the ground elevation (gis extra), instead of "
                   "--ground-elev-m.")
@click.option("--vertical-datum", default=None, metavar="DATUM",
              help="Vertical datum of the ground elevation: 'ellipsoid' (WGS 84) or a vertical CRS such as "
                   "EPSG:5773 (EGM96) or EPSG:3855 (EGM2008).")
def export(run, output, force, fmt, contents, policy, alt_m, ground_elev_m, dem, vertical_datum):
    """Write the waypoints, risk maps or hazard cells of run folder RUN for a simulator or a GIS.

    GeoJSON (RFC 7946, lon/lat), CSV (header first, notice in a 'use' column and a
    .txt sidecar) or GPX 1.1 waypoints; a GeoTIFF of each route's risk map and the
    cell labels in the working frame; or the hazard cells as GeoJSON polygons. Every
    file states that it is for simulation only and not approved for field operation.
    An existing file is replaced only with --force.

    The altitude above ground is written in its own field. GPX <ele> (elevation above
    sea level) and the GeoJSON third coordinate (height above the WGS 84 ellipsoid)
    are written only when the ground elevation is known (--ground-elev-m or --dem,
    with --vertical-datum); otherwise they are left out and the file says why.

    \b
    Examples:
      veerwise export run-yard -o routes.gpx --alt-m 30 --ground-elev-m 212 --vertical-datum EPSG:5773
      veerwise export run-yard -o cautious.geojson --policy cautious
      veerwise export run-yard -o riskmap.tif
      veerwise export run-yard -o hazard-cells.geojson --contents hazard-cells
    """
    from planner.export import (
        check_output,
        output_format,
        refuse_run_folder_target,
        sidecar_path,
    )
    from planner.runload import load_run
    from planner.transactions import read_lock

    out = Path(output)
    names = {"both": ("cautious", "shortest"), "all": ("cautious", "shortest", "budget")}.get(policy, (policy,))
    fmt = output_format(out, EXPORT_FORMATS, fmt=fmt)
    if contents == "hazard-cells" and fmt != "geojson":
        raise click.BadParameter(f"hazard cells are written as GeoJSON; -o {out} names {fmt}",
                                 param_hint="--contents")
    heights_given = ground_elev_m is not None or dem is not None or vertical_datum is not None
    if heights_given and (fmt not in ("geojson", "csv", "gpx") or contents != "waypoints"):
        raise click.BadParameter("ground elevation applies to waypoint files only", param_hint="--ground-elev-m/--dem")
    if ground_elev_m is not None and dem is not None:
        raise click.BadParameter("give --ground-elev-m or --dem, not both", param_hint="--dem")
    targets = ([out.with_name(f"{out.stem}-{n}{out.suffix}") for n in names] if fmt == "csv" and len(names) > 1
               else [out])
    for target in targets:
        refuse_run_folder_target(target, "-o/--output")
        check_output(target, EXPORT_FORMATS, fmt=fmt, force=force)
        if fmt == "csv":
            side = sidecar_path(target)
            refuse_run_folder_target(side, "-o/--output (sidecar)")
            if side.exists() and not force:
                raise click.BadParameter(f"the sidecar {side} already exists; choose another name or pass --force",
                                         param_hint="-o/--output")
    if fmt == "geotiff":
        from planner.gridfiles import require_rasterio

        require_rasterio(f"-o {out}: writing a GeoTIFF")
    ground = _ground(ground_elev_m, dem, vertical_datum)
    click.get_current_context().with_resource(read_lock(run))
    loaded = load_run(run)
    if "greedy_budget" not in loaded.arrays:
        if policy == "budget":
            raise click.BadParameter(f"run {run} has no within-budget route (plan it with --risk-budget)",
                                     param_hint="--policy")
        if policy == "all":
            names, targets = names[:2], targets[:2] if len(targets) > 1 else targets
    written = _export_files(loaded, fmt, contents, names, out, targets, alt_m, ground)
    for path in written:
        click.echo(f"wrote {path} (simulation only)")
    if fmt in ("geojson", "gpx", "csv") and contents == "waypoints" and ground is None:
        what = {"gpx": "<ele>", "geojson": "third coordinate", "csv": "elevation columns"}[fmt]
        click.echo(f"veerwise: note: no {what}: no ground elevation was given (--ground-elev-m with "
                   "--vertical-datum, or --dem); the altitude above ground has its own field", err=True)


def _ground(ground_elev_m, dem, vertical_datum):
    """The ground elevation the options give, or None."""
    from planner.elevation import constant_ground, dem_ground

    if ground_elev_m is not None:
        return constant_ground(ground_elev_m, vertical_datum)
    if dem is not None:
        return dem_ground(dem, vertical_datum)
    if vertical_datum is not None:
        raise click.BadParameter("needs --ground-elev-m or --dem", param_hint="--vertical-datum")
    return None


def _export_files(loaded, fmt, contents, names, out, targets, alt_m, ground) -> list:
    """Write the files ``export`` was asked for; returns their paths."""
    from planner.export import (
        atomic_output,
        csv_sidecar_text,
        notice,
        sidecar_path,
        write_csv,
        write_geojson,
        write_gpx,
    )
    from planner.runload import rebuild, run_routes

    site, grid, model = rebuild(loaded)
    if fmt == "geotiff" or contents == "hazard-cells":
        from planner.gridfiles import hazard_cells_geojson, write_grid_geotiff

        if contents == "hazard-cells":
            import json

            text = json.dumps(hazard_cells_geojson(grid, site.frame, notice=notice()), ensure_ascii=False,
                              allow_nan=False) + "\n"
            with atomic_output(out) as tmp:
                tmp.write_bytes(text.encode("utf-8"))
            return [out]
        from planner.model import epsilon_greedy
        from planner.risk import risk_map

        noise = loaded.settings.learn.epsilon
        maps = {n: risk_map(model, epsilon_greedy(loaded.arrays[f"greedy_{n}"], model.n_actions, noise))
                for n in names}
        with atomic_output(out) as tmp:
            write_grid_geotiff(tmp, grid, site.frame, maps, noise=noise,
                               drift_scale=loaded.settings.dynamics.drift_scale, notice=notice())
        return [out]
    routes = run_routes(loaded, site, grid, model)
    chosen = [routes[n] for n in names]
    if fmt == "geojson":
        return [write_geojson(chosen if len(chosen) > 1 else chosen[0], out, site=site, alt_m=alt_m, ground=ground)]
    if fmt == "gpx":
        return [write_gpx(chosen, out, alt_m=alt_m, ground=ground)]
    # every route's heights first (a DEM may not cover a waypoint): nothing is written unless all can be
    for r in chosen:
        csv_sidecar_text(r, alt_m=alt_m, ground=ground)
    written = []
    for r, target in zip(chosen, targets, strict=True):
        written += [write_csv(r, target, alt_m=alt_m, ground=ground), sidecar_path(target)]
    return written


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
    from planner.brief_page import pdf_unavailable
    from planner.cli.plan_commands import progress_console
    from planner.progress import Progress
    from planner.runload import rewrite_brief

    with Progress(progress_console(quiet)) as progress, progress.task("briefing (HTML, then PDF)"):
        html_path, pdf_path = rewrite_brief(run)
    click.echo(f"wrote {html_path} and {pdf_path}" if pdf_path else f"wrote {html_path}")
    if pdf_path is None:
        click.echo(f"veerwise: note: {pdf_unavailable()}", err=True)
