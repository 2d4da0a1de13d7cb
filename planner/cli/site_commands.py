"""``veerwise check`` and ``veerwise grid``: look at a site before planning on it."""

from __future__ import annotations

import json

import click

from planner.cli import cli
from planner.cli.options import (
    SectionedCommand,
    dynamics_options,
    force_option,
    grid_options,
    output_option,
    site_argument,
    site_options,
)


def load_site_and_spec(site, crs, fix, max_bytes, cell_m, hazard_overlap, boundary_cover, max_cells):
    """Read the site and make the grid settings (the cell size defaults from the site)."""
    from planner.gis import load_sites
    from planner.grid import GridSpec, default_cell_m, grid_shape

    loaded = load_sites(site, crs=crs, fix=fix, max_bytes=max_bytes)
    for note in loaded.notes:
        click.echo(f"veerwise: note: {note}", err=True)
    if cell_m is None:
        cell_m = default_cell_m(loaded)
    spec = GridSpec(cell_m=cell_m, hazard_overlap=hazard_overlap, boundary_cover=boundary_cover,
                    max_cells=max_cells)
    grid_shape(loaded, spec.cell_m)
    return loaded, spec


def make_dynamics(n_actions, slip, stall, drift_scale, edge, penalty_m, move_m, site, spec):
    """The vehicle's settings from the command-line options.

    The move length defaults to the site's default cell size (or one cell, when --cell
    is coarser than that) and may not be shorter than the cell.
    """
    from planner.grid import default_cell_m
    from planner.motion import Dynamics

    move = max(default_cell_m(site), spec.cell_m) if move_m is None else move_m
    dynamics = Dynamics(n_actions=n_actions, slip=slip, stall=stall, drift_scale=drift_scale, edge=edge,
                        hazard_penalty_m=penalty_m, move_m=move)
    dynamics.move_length_m(spec.cell_m)
    return dynamics


@cli.command(cls=SectionedCommand)
@site_argument
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@site_options
@grid_options
@dynamics_options
def check(site, crs, fix, max_bytes, cell_m, hazard_overlap, boundary_cover, max_cells, n_actions, move_m, slip,
          stall, drift_scale, edge, penalty_m, as_json):
    """Validate SITE (one or more files, merged) and print its summary.

    Reports where on Earth the site is (its centre in lat/lon), the working frame and
    its largest scale distortion, the extent in metres, the zones by role, the grid
    size at --cell, the model's memory estimate and any warnings (coordinates that look
    swapped or projected among them). Exit code 2 and one line naming the feature when
    the site is invalid.

    SITE is GeoJSON, or with the gis extra any vector format GDAL reads (a GeoPackage
    with one layer per role, a Shapefile, ...). Several files are merged into one site:
    a boundary in one, hazards in another.

    \b
    Examples:
      veerwise check maps/ground-yard.geojson
      veerwise check maps/drone-range.geojson --cell 5 --json
      veerwise check yard-outline.gpkg hazards.geojson
    """
    from planner.model import site_summary

    loaded, spec = load_site_and_spec(site, crs, fix, max_bytes, cell_m, hazard_overlap, boundary_cover,
                                      max_cells)
    summary = site_summary(loaded, spec, make_dynamics(n_actions, slip, stall, drift_scale, edge, penalty_m, move_m,
                                                       loaded, spec))
    if as_json:
        click.echo(json.dumps(summary, indent=2, sort_keys=True))
        return
    click.echo(format_summary(summary))


def format_summary(s: dict) -> str:
    """``check``'s summary of a site as text."""
    from planner.notation import hemisphere

    g, m, z = s["grid"], s["model"], s["zones"]
    frame = s["frame"]
    kind = "local transverse Mercator" if frame["kind"] == "local-tmerc" else "named CRS"
    lines = [
        f"site        {s['site']}  ({s['source']})",
        f"sha256      {s['sha256'][:16]}...",
        f"frame       {kind}; largest scale distortion {frame['largest_scale_distortion']:.1e}",
        f"centre      {hemisphere(s['centre']['lat'], s['centre']['lon'])} (WGS 84); site "
        f"{s['extent_m']['east']:.0f} m east-west x {s['extent_m']['north']:.0f} m north-south",
        f"start/goal  {s['start']} -> {s['goal']}",
        f"hazards     {len(z['hazard'])}",
    ]
    for h in z["hazard"]:
        ends = "ends run" if h["ends_run"] else "run goes on"
        buffer = f", buffer {h['buffer_m']:g} m" if h["buffer_m"] else ""
        lines.append(f"  - {h['name']} ({ends}, penalty {h['penalty_m']:g} m{buffer})")
    lines.append(f"rough       {len(z['rough'])}")
    lines += [f"  - {r['name']} (cost x{r['cost_factor']:g})" for r in z["rough"]]
    lines.append(f"drift       {len(z['drift'])}")
    for d in z["drift"]:
        chance = f", chance {d['chance']:g}" if d["chance"] < 1 else ""
        lines.append(f"  - {d['name']} (toward {d['toward_deg']:.0f} deg, drift {d['drift_per_m']:g} m/m, "
                     f"spread {d['spread_per_sqrt_m']:g} m/sqrt(m){chance})")
    lines += [
        f"grid        {g['cols']} x {g['rows']} cells of {g['cell_m']:g} m = {g['cells']:,} cells "
        f"({g['usable_cells']:,} usable, {g['goal_cells']:,} of them goal; {g['hazard_cells']:,} hazard; "
        f"budget {g['max_cells']:,})",
        f"model       {m['headings']} headings, move {m['move_m']:g} m, slip {m['slip']:g}, stall {m['stall']:g}, "
        f"drift x{m['drift_scale']:g}, "
        f"edge {m['edge']}; about {m['estimated_bytes'] / 2**20:.0f} MiB",
    ]
    if s["warnings"]:
        lines.append(f"warnings    {len(s['warnings'])}")
        lines += [f"  ! {w}" for w in s["warnings"]]
    else:
        lines.append("warnings    none")
    return "\n".join(lines)


@cli.command(cls=SectionedCommand)
@site_argument
@output_option("PNG file to write.")
@force_option
@site_options
@grid_options
def grid(site, output, force, crs, fix, max_bytes, cell_m, hazard_overlap, boundary_cover, max_cells):
    """Draw the labelled grid of SITE to a PNG.

    Shows hazards (with buffers), rough ground, drift arrows, start, goal, a legend, a
    metre scale bar and a north arrow. Nothing is written when the site is invalid, and
    an existing file is replaced only with --force.

    \b
    Example:
      veerwise grid maps/drone-range.geojson --cell 5 -o drone-range.png
    """
    from planner.export import atomic_output, check_output
    from planner.grid import rasterise
    from planner.plots import plot_grid

    check_output(output, ("png",), force=force)
    loaded, spec = load_site_and_spec(site, crs, fix, max_bytes, cell_m, hazard_overlap, boundary_cover,
                                      max_cells)
    labelled = rasterise(loaded, spec)
    with atomic_output(output) as tmp:
        plot_grid(loaded, labelled, tmp)
    click.echo(f"wrote {output} ({labelled.shape[1]} x {labelled.shape[0]} cells of {spec.cell_m:g} m)")


@cli.command("site-template", cls=SectionedCommand)
@output_option("Template to write: .geojson (or .json) or .gpkg (GeoPackage, gis extra).")
@force_option
def site_template(output, force):
    """Write an empty site template to draw a yard on in a GIS editor.

    Its layers already have every column with its type and one example feature per
    role (boundary, start, goal, hazard, rough, drift), at a fictional spot: open it in
    the GIS editor, redraw or move the examples onto the yard, delete what does not
    apply, save, and run `veerwise check` on it. The GeoPackage has one layer per role;
    the GeoJSON one layer holding every column (null where a column does not apply)
    and a second drift example, so that the editor types its from_deg column too.

    \b
    Examples:
      veerwise site-template -o my-yard.gpkg
      veerwise site-template -o my-yard.geojson
    """
    from planner.export import atomic_output, check_output
    from planner.gis import template_geojson_text, write_template_geopackage

    fmt = check_output(output, ("geojson", "geopackage"), force=force)
    if fmt == "geopackage":
        from planner.gis import require_pyogrio

        require_pyogrio(f"-o {output}: writing a GeoPackage")
        with atomic_output(output) as tmp:
            tmp.unlink()  # GDAL creates the GeoPackage itself
            write_template_geopackage(tmp)
    else:
        with atomic_output(output) as tmp:
            tmp.write_bytes(template_geojson_text().encode("utf-8"))
    click.echo(f"wrote {output}: one example feature per role to redraw on your yard, then run veerwise check on it")
