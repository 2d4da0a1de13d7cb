"""Figures: the maps (the labelled grid, the routes) and what every figure module shares.

Drawn with matplotlib's Agg backend. Each ``plot_*`` function takes finished results
and a path, draws one PNG and returns the path; its ``figure_*`` twin returns the
figure unsaved, for callers that inspect it. The map layers (cells, hatching, zone
outlines, drift arrows, start and goal, routes), zone labels placed where they
overlap nothing, the scale bar, the north arrow and the legend are drawn here, with
the private matplotlib context (:func:`styled`) and the saving (:func:`save`) that
the other figure modules use too: :mod:`planner.plots_risk` (risk maps and the
sensitivity chart), :mod:`planner.plots_learning` (learning curves) and
:mod:`planner.plots_budget` (the risk budget's figures). Colours and symbols come
from ``planner.style``.
"""

from __future__ import annotations

import functools
import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib import patheffects  # noqa: E402
from matplotlib.colors import ListedColormap  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402

from planner import style  # noqa: E402
from planner.grid import OUTSIDE, Grid  # noqa: E402


def styled(draw):
    """Draw with our settings in a private matplotlib context.

    Nothing global changes, so a figure never depends on what the process drew before.
    """

    @functools.wraps(draw)
    def wrapper(*args, **kwargs):
        # Names from the site file are text, never TeX or mathtext ("$x$", "\\" stay as drawn).
        with plt.rc_context({"font.size": style.FONT_SIZE, "svg.hashsalt": "veerwise", "text.usetex": False,
                             "text.parse_math": False}):
            return draw(*args, **kwargs)

    return wrapper


#: How labels, arrows and markers are told apart among the drawn artists (tests read these).
LABEL_GID = "zone-label"
DRIFT_GID = "drift-arrow"
ROUTE_GID = "route"
FURNITURE_GID = "furniture"
#: Least space between two labels, points.
LABEL_GAP_PT = 2.0
#: Z-order of the layers of a map, bottom to top.
Z_CELLS, Z_HATCH, Z_OUTLINE, Z_ROUTE, Z_DRIFT, Z_MARKER, Z_LABEL, Z_FURNITURE = 1, 2, 4, 6, 7, 8, 9, 10


def _new_axes(grid: Grid, title: str, width_in: float = style.MAP_WIDTH_IN, n_legend_rows: int = 3):
    """A map axes whose figure has the map's own aspect, so the map fills its canvas.

    There is room below for a legend of ``n_legend_rows`` rows.
    """
    n_rows, n_cols = grid.shape
    aspect = n_rows / max(n_cols, 1)
    map_h = (width_in - 0.8) * aspect
    legend_h = 0.25 + 0.19 * n_legend_rows
    fig = plt.figure(figsize=(width_in, map_h + 0.75 + legend_h), dpi=style.FIGURE_DPI)
    height = map_h + 0.75 + legend_h
    ax = fig.add_axes([0.62 / width_in, (legend_h + 0.42) / height, (width_in - 0.8) / width_in, map_h / height])
    ax.set_title(title, fontsize=style.FONT_SIZE + 2, loc="left", color=style.TEXT)
    ax.set_title(style.FIGURE_NOTICE, fontsize=style.FONT_SIZE - 2, loc="right", color=style.MUTED)
    ax.set_aspect("equal")
    ax.set_xlabel("east (m)")
    ax.set_ylabel("north (m)")
    return fig, ax


def map_extent(grid: Grid):
    """The map's extent in metres, ``(west, east, south, north)``, as ``imshow`` takes it."""
    n_rows, n_cols = grid.shape
    return (grid.x0, grid.x0 + n_cols * grid.cell_m, grid.y0, grid.y0 + n_rows * grid.cell_m)


def _category_image(grid: Grid) -> tuple[np.ndarray, ListedColormap]:
    """Cell categories: 0 outside, 1 free, 2 rough, 3 soft hazard, 4 ending hazard, 5 goal."""
    lab = grid.label
    cat = np.ones(grid.shape, dtype=int)
    cat[grid.cost_factor > 1.0] = 2
    ends = np.array([h.ends_run for h in grid.hazards] + [True], dtype=bool)
    hazard = lab >= 0
    cat[hazard & ~ends[np.where(hazard, lab, -1)]] = 3
    cat[hazard & ends[np.where(hazard, lab, -1)]] = 4
    cat[lab == OUTSIDE] = 0
    cat[grid.goal] = 5
    cmap = ListedColormap([style.OUTSIDE, style.FREE, style.ROUGH, style.HAZARD_SOFT, style.HAZARD, style.GOAL])
    return cat, cmap


def ending_hazard_cells(grid: Grid) -> np.ndarray:
    """Bool ``grid.shape``: cells of hazards that end the run."""
    ends = np.array([h.ends_run for h in grid.hazards] + [True], dtype=bool)
    lab = grid.label
    return (lab >= 0) & ends[np.where(lab >= 0, lab, -1)]


def _cell_polygons(grid: Grid, mask: np.ndarray):
    """The cells of ``mask`` merged into polygons (metres), for hatching and outlines."""
    import shapely

    rows, cols = np.nonzero(mask)
    x0 = grid.x0 + cols * grid.cell_m
    y0 = grid.y0 + rows * grid.cell_m
    merged = shapely.union_all(shapely.box(x0, y0, x0 + grid.cell_m, y0 + grid.cell_m))
    return list(getattr(merged, "geoms", [merged]))


def _polygon_path(poly):
    from matplotlib.path import Path as MplPath

    rings = [np.asarray(poly.exterior.coords)] + [np.asarray(r.coords) for r in poly.interiors]
    codes = []
    for ring in rings:
        codes += [MplPath.MOVETO] + [MplPath.LINETO] * (len(ring) - 2) + [MplPath.CLOSEPOLY]
    return MplPath(np.concatenate(rings), codes)


def hatch_cells(ax, grid: Grid, mask: np.ndarray, *, face: str | None, hatch_color: str, edge: str | None = None):
    """Hatch (and optionally fill) the cells of ``mask``; outline them in ``edge``."""
    from matplotlib.patches import PathPatch

    if not mask.any():
        return
    for poly in _cell_polygons(grid, mask):
        if poly.is_empty:
            continue
        ax.add_patch(PathPatch(_polygon_path(poly), facecolor=face or "none", edgecolor=edge or "none",
                               hatch=style.HAZARD_HATCH, hatchcolor=hatch_color, lw=0.8 if edge else 0,
                               zorder=Z_HATCH, gid="hatch"))


def draw_site(ax, grid: Grid, site=None, *, drift_arrows: bool = True, cells: bool = True):
    """Draw the labelled grid, zone outlines, buffers, drift arrows, start and goal.

    Run-ending hazards are hatched; zone labels come last, from :func:`place_labels`.
    """
    if cells:
        cat, cmap = _category_image(grid)
        ax.imshow(cat, origin="lower", extent=map_extent(grid), cmap=cmap, vmin=0, vmax=5, interpolation="nearest",
                  zorder=Z_CELLS)
        hatch_cells(ax, grid, ending_hazard_cells(grid), face=None, hatch_color=style.HATCH_COLOR)
    if site is not None:
        _outline(ax, site.boundary, color=style.TEXT, lw=1.0)
        for zone in site.hazards:
            _outline(ax, zone.geometry, color=style.HAZARD, lw=0.9)
            if zone.buffer_m > 0:
                _outline(ax, zone.buffered, color=style.BUFFER_EDGE, lw=0.8, ls=(0, (3, 2)))
        for zone in site.drifts:
            _outline(ax, zone.geometry, color=style.DRIFT, lw=0.8, ls=(0, (1, 1.5)))
    if drift_arrows and grid.drifts:
        _drift_arrows(ax, grid)
    xs, ys = grid.centres()
    r, c = grid.start
    ax.plot(xs[r, c], ys[r, c], style.START_MARKER, color=style.START, ms=10, mec="white", mew=1.2,
            zorder=Z_MARKER, gid="start")
    goal_r, goal_c = np.nonzero(grid.goal)
    ax.plot(xs[goal_r, goal_c].mean(), ys[goal_r, goal_c].mean(), style.GOAL_MARKER, color=style.GOAL, ms=9,
            mec="white", mew=1.2, zorder=Z_MARKER, gid="goal")
    x0, x1, y0, y1 = map_extent(grid)
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)


def _outline(ax, geometry, *, color, lw, ls="-"):
    for poly in getattr(geometry, "geoms", [geometry]):
        x, y = poly.exterior.xy
        ax.plot(x, y, color=color, lw=lw, ls=ls, zorder=Z_OUTLINE)
        for ring in poly.interiors:
            x, y = ring.xy
            ax.plot(x, y, color=color, lw=lw, ls=ls, zorder=Z_OUTLINE)


# ----------------------------------------------------------------------------- labels


def label_box(text, renderer):
    """The display box of a label's text alone (its leader line, if any, not included)."""
    from matplotlib.text import Text

    if hasattr(text, "update_positions"):
        text.update_positions(renderer)  # an annotation places its text only when asked
    return Text.get_window_extent(text, renderer)


def boxes_overlap(a, b, pad: float = 1.0) -> bool:
    """Whether two display boxes come within ``pad`` pixels of each other."""
    return not (a.x1 + pad <= b.x0 or b.x1 + pad <= a.x0 or a.y1 + pad <= b.y0 or b.y1 + pad <= a.y0)


def _inside_points(geometry, n: int = 5) -> list[tuple[float, float]]:
    """Candidate anchor points inside a polygon: its representative point, then a lattice."""
    import shapely

    points = [geometry.representative_point()]
    x0, y0, x1, y1 = geometry.bounds
    gx, gy = np.meshgrid(np.linspace(x0, x1, n + 2)[1:-1], np.linspace(y0, y1, n + 2)[1:-1])
    lattice = shapely.points(gx.ravel(), gy.ravel())
    inside = shapely.contains(geometry, lattice)
    centre = geometry.centroid
    order = np.argsort([p.distance(centre) for p in lattice])
    points += [lattice[k] for k in order if inside[k]]
    return [(p.x, p.y) for p in points]


def _route_points(ax, spacing_px: float = 3.0) -> np.ndarray:
    """Display coordinates along every route line of ``ax``, at most ``spacing_px`` apart."""
    out = []
    for line in ax.lines:
        if line.get_gid() != ROUTE_GID:
            continue
        xy = ax.transData.transform(np.column_stack(line.get_data()))
        for a, b in zip(xy[:-1], xy[1:], strict=True):
            n = max(2, int(np.hypot(*(b - a)) / spacing_px) + 1)
            out.append(a + (b - a) * np.linspace(0.0, 1.0, n)[:, None])
    return np.concatenate(out) if out else np.zeros((0, 2))


#: Offsets (points) tried for a label with a leader line when it fits nowhere inside its zone.
_LEADER_OFFSETS = [(dx * r, dy * r) for r in (26, 44) for dx, dy in
                   ((0, 1), (1, 0), (0, -1), (-1, 0), (0.8, 0.8), (-0.8, 0.8), (0.8, -0.8), (-0.8, -0.8))]


def place_labels(ax, items) -> list[str]:
    """Put each ``(name, geometry)`` label where it overlaps nothing else.

    A label overlaps no other label, marker or the axes edge: it goes inside its zone
    if it fits, else beside it with a leader line; a label that fits nowhere is left
    out. Returns the names left out (the caller notes them).
    """
    fig = ax.figure
    renderer = fig.canvas.get_renderer()
    axes_box = ax.get_window_extent(renderer)
    taken = [line.get_window_extent(renderer).expanded(1.3, 1.3) for line in ax.lines
             if line.get_gid() in ("start", "goal")]
    taken += [t.get_window_extent(renderer) for t in ax.texts if t.get_gid() == FURNITURE_GID]
    taken += [p.get_window_extent(renderer) for p in ax.patches if p.get_gid() == DRIFT_GID]
    # routes stay readable: no label box may cover a point of a route line
    route_points = _route_points(ax)
    gap = LABEL_GAP_PT * fig.dpi / 72.0
    left_out = []
    # larger zones first: small ones have fewer places to go and are the ones left out
    for name, geometry in sorted(items, key=lambda it: -it[1].area):
        placed = None
        candidates = [((x, y), None) for x, y in _inside_points(geometry)]
        anchor = geometry.representative_point()
        candidates += [((anchor.x, anchor.y), off) for off in _LEADER_OFFSETS]
        for xy, offset in candidates:
            kwargs = dict(fontsize=style.FONT_SIZE - 2, ha="center", va="center", color=style.TEXT,
                          zorder=Z_LABEL, gid=LABEL_GID, annotation_clip=False,
                          bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.8})
            if offset is None:
                text = ax.annotate(name, xy, **kwargs)
            else:
                text = ax.annotate(name, xy, xytext=offset, textcoords="offset points",
                                   arrowprops={"arrowstyle": "-", "color": style.TEXT, "lw": 0.6,
                                               "shrinkA": 0, "shrinkB": 0}, **kwargs)
            box = label_box(text, renderer)
            inside_axes = (box.x0 >= axes_box.x0 and box.x1 <= axes_box.x1 and box.y0 >= axes_box.y0
                           and box.y1 <= axes_box.y1)
            covers_route = bool(route_points.size) and bool(np.any(
                (route_points[:, 0] >= box.x0) & (route_points[:, 0] <= box.x1)
                & (route_points[:, 1] >= box.y0) & (route_points[:, 1] <= box.y1)))
            if inside_axes and not covers_route and not any(boxes_overlap(box, other, gap) for other in taken):
                placed = box
                break
            text.remove()
        if placed is None:
            left_out.append(name)
        else:
            taken.append(placed)
    return left_out


# ----------------------------------------------------------------------------- drift


def _drift_arrows(ax, grid: Grid):
    """Arrows on a coarse lattice of drift cells, drawn above the routes.

    Direction shows the mean push, length its strength relative to the strongest zone.
    """
    from matplotlib.patches import FancyArrowPatch

    n_rows, n_cols = grid.shape
    step = max(2, int(round(max(n_rows, n_cols) / 14)))
    xs, ys = grid.centres()
    east = np.zeros(grid.shape)
    north = np.zeros(grid.shape)
    for k, members in enumerate(grid.drift_members):
        if not members:
            continue
        mask = grid.drift_class == k
        # The push over one cell of travel, so arrows keep their size at any drift ratio's scale.
        east[mask] = sum(grid.drifts[m].vector_per_m()[0] * grid.cell_m * grid.drifts[m].chance for m in members)
        north[mask] = sum(grid.drifts[m].vector_per_m()[1] * grid.cell_m * grid.drifts[m].chance for m in members)
    strength = np.hypot(east, north)
    sel = np.zeros(grid.shape, dtype=bool)
    sel[step // 2::step, step // 2::step] = True
    sel &= (strength > 0) & (grid.label != OUTSIDE)
    if not sel.any():
        return
    longest = 0.8 * step * grid.cell_m
    scale = longest / float(strength[sel].max())
    for x, y, dx, dy in zip(xs[sel], ys[sel], east[sel] * scale, north[sel] * scale, strict=True):
        arrow = FancyArrowPatch((x - dx / 2, y - dy / 2), (x + dx / 2, y + dy / 2), arrowstyle="-|>",
                                mutation_scale=11, lw=1.6, color=style.DRIFT, zorder=Z_DRIFT, gid=DRIFT_GID,
                                shrinkA=0, shrinkB=0)
        arrow.set_path_effects([patheffects.withStroke(linewidth=3.2, foreground=style.DRIFT_EDGE)])
        ax.add_patch(arrow)


def add_scale_bar(ax, grid: Grid):
    """A metre scale bar of a round length, lower left."""
    x0, x1, y0, y1 = map_extent(grid)
    width = x1 - x0
    target = width / 5
    length = 10 ** math.floor(math.log10(target))
    for mult in (5, 2, 1):
        if mult * length <= target:
            length *= mult
            break
    bx, by = x0 + 0.04 * width, y0 + 0.05 * (y1 - y0)
    ax.plot([bx, bx + length], [by, by], color="black", lw=3, solid_capstyle="butt", zorder=Z_FURNITURE)
    ax.plot([bx, bx + length], [by, by], color="white", lw=1, solid_capstyle="butt", zorder=Z_FURNITURE)
    ax.text(bx + length / 2, by + 0.02 * (y1 - y0), f"{length:g} m", ha="center", va="bottom", zorder=Z_FURNITURE,
            fontsize=style.FONT_SIZE, bbox={"fc": "white", "ec": "none", "alpha": 0.7, "pad": 1}, gid=FURNITURE_GID)


def add_north_arrow(ax, grid: Grid):
    """A north arrow, upper right (the working frame's y axis points to grid north)."""
    x0, x1, y0, y1 = map_extent(grid)
    x, y = x1 - 0.05 * (x1 - x0), y1 - 0.16 * (y1 - y0)
    ax.annotate("N", xy=(x, y1 - 0.04 * (y1 - y0)), xytext=(x, y), ha="center", va="top", zorder=Z_FURNITURE,
                fontsize=style.FONT_SIZE + 1, fontweight="bold", gid=FURNITURE_GID,
                arrowprops={"arrowstyle": "-|>", "color": "black", "lw": 1.5})


def site_legend_handles(grid: Grid, site=None) -> list:
    """Legend entries for what the map shows; open ground (the background) needs none."""
    handles = [Patch(fc=style.HAZARD, ec=style.HAZARD, hatch=style.HAZARD_HATCH, hatchcolor=style.HATCH_COLOR,
                     label="hazard (ends the run)")]
    if any(not h.ends_run for h in grid.hazards):
        handles.append(Patch(fc=style.HAZARD_SOFT, label="hazard (penalty, run goes on)"))
    if site is not None and any(z.buffer_m > 0 for z in site.hazards):
        handles.append(Line2D([], [], color=style.BUFFER_EDGE, ls=(0, (3, 2)), label="hazard buffer"))
    if (grid.cost_factor > 1).any():
        handles.append(Patch(fc=style.ROUGH, label="rough (costs more)"))
    if grid.drifts:
        handles.append(Line2D([], [], color=style.DRIFT, marker=r"$\rightarrow$", ls="none", ms=12,
                              label="drift (mean push)"))
    if (grid.label == OUTSIDE).any():
        handles.append(Patch(fc=style.OUTSIDE, label="outside boundary"))
    handles += [Line2D([], [], marker=style.START_MARKER, color=style.START, ls="none", ms=8, label="start"),
                Line2D([], [], marker=style.GOAL_MARKER, color=style.GOAL, ls="none", ms=8, label="goal")]
    return handles


def _legend_below(ax, handles, note: str | None = None):
    """A compact legend in columns under the map (and a note under it, e.g. labels left out)."""
    below = 0.5 / (ax.get_position().height * ax.figure.get_figheight())  # under the x label, in axes units
    legend = ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.0, -below), ncol=3,
                       fontsize=style.FONT_SIZE - 1, frameon=False, borderaxespad=0.0, columnspacing=1.4,
                       handlelength=1.8)
    if note:
        ax.annotate(note, (0, 0), xycoords=legend, xytext=(0, -3), textcoords="offset points", va="top",
                    fontsize=style.FONT_SIZE - 2, color=style.MUTED)
    return legend


def _left_out_note(names) -> str | None:
    return f"labels left out for lack of room: {', '.join(names)}" if names else None


def save(fig, path) -> Path:
    """Write ``fig`` as a PNG at ``path`` (no software stamp, so the bytes repeat) and close it."""
    path = Path(path)
    fig.savefig(path, dpi=style.FIGURE_DPI, metadata={"Software": None}, bbox_inches="tight", pad_inches=0.08)
    plt.close(fig)
    return path


def _finish(fig, ax, handles, grid, site):
    """Scale bar, north arrow, zone labels (placed around them) and the legend below."""
    add_scale_bar(ax, grid)
    add_north_arrow(ax, grid)
    left_out = place_labels(ax, [(z.name, z.geometry) for z in site.zones])
    _legend_below(ax, handles, _left_out_note(left_out))
    return fig


def _legend_rows(n: int) -> int:
    return -(-n // 3)


@styled
def figure_grid(site, grid: Grid):
    """The figure of :func:`plot_grid`, not yet saved (for callers that inspect it)."""
    handles = site_legend_handles(grid, site)
    title = f"{site.name} - grid {grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m"
    fig, ax = _new_axes(grid, title, n_legend_rows=_legend_rows(len(handles)) + 1)
    draw_site(ax, grid, site)
    return _finish(fig, ax, handles, grid, site)


@styled
def plot_grid(site, grid: Grid, path) -> Path:
    """The labelled grid of a site.

    Zones, buffers, drift arrows, start, goal, legend, scale bar and north arrow.
    """
    return save(figure_grid(site, grid), path)


def draw_routes(ax, grid: Grid, routes: dict, *, waypoints: bool = True):
    """Each policy's nominal route (below the drift arrows), with its waypoints."""
    for name, route in routes.items():
        look = style.ROUTE[name]
        xy = np.asarray(route.path_m, dtype=float)
        ax.plot(xy[:, 0], xy[:, 1], color=look["color"], ls=look["linestyle"], lw=2.2, zorder=Z_ROUTE,
                gid=ROUTE_GID, label=f"{look['label']}: {route.length_m:.0f} m")
        if waypoints and route.waypoints:
            wx = [w.east_m for w in route.waypoints]
            wy = [w.north_m for w in route.waypoints]
            ax.plot(wx, wy, "o", color=look["color"], ms=3.5, mec="white", mew=0.6, zorder=Z_ROUTE)


def route_handles(routes: dict) -> list:
    """Legend entries for the routes drawn, each with its length."""
    return [Line2D([], [], color=style.ROUTE[n]["color"], ls=style.ROUTE[n]["linestyle"], lw=2.2,
                   label=f"{style.ROUTE[n]['label']}: {routes[n].length_m:.0f} m") for n in routes]


@styled
def figure_routes(site, grid: Grid, routes: dict, *, title: str | None = None):
    """The figure of :func:`plot_routes`, not yet saved."""
    handles = route_handles(routes) + site_legend_handles(grid, site)
    fig, ax = _new_axes(grid, title or f"{site.name} - nominal routes", n_legend_rows=_legend_rows(len(handles)) + 1)
    draw_routes(ax, grid, routes)
    draw_site(ax, grid, site)
    return _finish(fig, ax, handles, grid, site)


@styled
def plot_routes(site, grid: Grid, routes: dict, path, *, title: str | None = None) -> Path:
    """The site with both nominal routes and their waypoints; drift arrows drawn above them."""
    return save(figure_routes(site, grid, routes, title=title), path)
