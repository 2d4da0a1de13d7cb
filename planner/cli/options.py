"""Options shared by several commands, defined once."""

from __future__ import annotations

import click

from planner.grid import DEFAULT_MAX_CELLS
from planner.site import DEFAULT_MAX_BYTES

site_argument = click.argument("site", type=click.Path(dir_okay=False, path_type=str))


def site_options(f):
    """Options that control how a site file is read and projected."""
    f = click.option("--crs", default=None, metavar="CRS",
                     help="Projected metric CRS to work in (e.g. EPSG:32632); default: local transverse Mercator.")(f)
    f = click.option("--fix", is_flag=True, help="Repair invalid polygons (with a warning) instead of refusing them.")(f)
    f = click.option("--max-bytes", type=int, default=DEFAULT_MAX_BYTES, show_default=True,
                     help="Refuse site files larger than this many bytes before reading them.")(f)
    return f


def grid_options(f):
    """Options that control rasterising."""
    f = click.option("--cell", "cell_m", type=float, default=None, metavar="M",
                     help="Cell size in metres (default: about 1/100 of the site's longer side, rounded to 0.5 m).")(f)
    f = click.option("--hazard-overlap", type=float, default=0.0, show_default=True,
                     help="A cell is hazard when a buffered hazard covers more than this fraction of it.")(f)
    f = click.option("--boundary-cover", type=float, default=1.0, show_default=True,
                     help="A cell is inside when the boundary covers at least this fraction of it.")(f)
    f = click.option("--max-cells", type=int, default=DEFAULT_MAX_CELLS, show_default=True,
                     help="Refuse grids with more cells than this.")(f)
    return f


def dynamics_options(f):
    """Options of the transition model."""
    f = click.option("--moves", "n_actions", type=click.Choice(["8", "4"]), default="8", show_default=True,
                     help="King moves (8) or rook moves (4).")(f)
    f = click.option("--slip", type=float, default=0.1, show_default=True,
                     help="Probability a move veers to a neighbouring direction.")(f)
    f = click.option("--stall", type=float, default=0.0, show_default=True,
                     help="Probability a move does not happen (drift still acts).")(f)
    f = click.option("--drift-scale", type=float, default=1.0, show_default=True,
                     help="Multiplies every drift push and spread (1 = as forecast).")(f)
    f = click.option("--edge", type=click.Choice(["boundary", "wall"]), default="boundary", show_default=True,
                     help="Leaving the boundary is an incident (boundary) or blocked (wall).")(f)
    f = click.option("--penalty", "penalty_m", type=float, default=None, metavar="M",
                     help="Hazard penalty in metres-equivalent for hazards without penalty_m (default: derived).")(f)
    return f
