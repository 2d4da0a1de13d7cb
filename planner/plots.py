"""Figures: every picture veerwise draws, with matplotlib's Agg backend.

Each function takes finished results and a path, draws one PNG, and returns the path.
Colours and symbols come from ``planner.style``.
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


def _styled(draw):
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


def _extent(grid: Grid):
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


def _hatch_cells(ax, grid: Grid, mask: np.ndarray, *, face: str | None, hatch_color: str, edge: str | None = None):
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
        ax.imshow(cat, origin="lower", extent=_extent(grid), cmap=cmap, vmin=0, vmax=5, interpolation="nearest",
                  zorder=Z_CELLS)
        _hatch_cells(ax, grid, ending_hazard_cells(grid), face=None, hatch_color=style.HATCH_COLOR)
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
    x0, x1, y0, y1 = _extent(grid)
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


def _boxes_overlap(a, b, pad: float = 1.0) -> bool:
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
            if inside_axes and not covers_route and not any(_boxes_overlap(box, other, gap) for other in taken):
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
    x0, x1, y0, y1 = _extent(grid)
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
    x0, x1, y0, y1 = _extent(grid)
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


def _save(fig, path) -> Path:
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


@_styled
def figure_grid(site, grid: Grid):
    """The figure of :func:`plot_grid`, not yet saved (for callers that inspect it)."""
    handles = site_legend_handles(grid, site)
    title = f"{site.name} - grid {grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m"
    fig, ax = _new_axes(grid, title, n_legend_rows=_legend_rows(len(handles)) + 1)
    draw_site(ax, grid, site)
    return _finish(fig, ax, handles, grid, site)


@_styled
def plot_grid(site, grid: Grid, path) -> Path:
    """The labelled grid of a site.

    Zones, buffers, drift arrows, start, goal, legend, scale bar and north arrow.
    """
    return _save(figure_grid(site, grid), path)


def _moving_average(values: np.ndarray, window: int) -> np.ndarray:
    """Trailing moving average along the last axis (the first points average fewer)."""
    csum = np.cumsum(values, axis=-1)
    out = np.empty_like(csum, dtype=float)
    n = values.shape[-1]
    idx = np.arange(n)
    lo = np.maximum(idx - window, -1)
    upper = csum[..., idx]
    lower = np.where(lo >= 0, csum[..., np.maximum(lo, 0)], 0.0)
    out[...] = (upper - lower) / (idx - lo)
    return out


@_styled
def plot_learning(learned: dict, path, *, title: str = "Learning curves") -> Path:
    """Learning curves of both learners.

    Return per episode (moving average; mean and min-max band over seeds), and hazard
    incidents per episode during training.
    """
    episodic = {n: r for n, r in learned.items() if r.settings.schedule == "episodes"}
    swept = {n: r for n, r in learned.items() if r.settings.schedule == "sweeps"}
    rows = (2 if episodic else 0) + (2 if swept else 0)
    fig, axes = plt.subplots(rows, 1, figsize=(7.5, 6.2) if not (episodic and swept) else (7.5, 10.4),
                             dpi=style.FIGURE_DPI,
                             gridspec_kw={"height_ratios": ([2.2, 1.0] if episodic else [])
                                          + ([1.4, 1.4] if swept else [])})
    axes = np.atleast_1d(axes)
    if swept:
        axes[-1].sharex(axes[-2])
        _sweep_value_panel(axes[-2], swept, title if not episodic else None)
        _sweep_panel(axes[-1], swept, None)
    if not episodic:
        return _save_learning(fig, path)
    ax1, ax2 = axes[0], axes[1]
    ax2.sharex(ax1)
    for name, result in episodic.items():
        look = style.POLICY[name]
        n_ep = result.returns.shape[1]
        window = max(1, n_ep // 50)
        x = np.arange(1, n_ep + 1)
        smooth = _moving_average(result.returns, window)
        ax1.fill_between(x, smooth.min(axis=0), smooth.max(axis=0), color=look["color"], alpha=0.18, lw=0)
        ax1.plot(x, smooth.mean(axis=0), color=look["color"], ls=look["linestyle"], lw=1.6,
                 label=f"{look['label']}: mean of {result.returns.shape[0]} seeds")
        incidents = (result.ends >= 2).astype(float)  # boundary or an ending hazard
        ax2.plot(x, _moving_average(incidents, window).mean(axis=0), color=look["color"], ls=look["linestyle"],
                 lw=1.4, label=look["label"])
    ax1.set_ylabel(f"return per episode (m-equiv.)\nmoving average over {window} episodes")
    ax1.set_title(title, loc="left", fontsize=style.FONT_SIZE + 2)
    ax1.legend(fontsize=style.FONT_SIZE - 1, loc="lower right")
    ax1.grid(alpha=0.3)
    ax2.set_ylabel("episodes ending\nin an incident")
    from matplotlib.ticker import PercentFormatter

    ax2.yaxis.set_major_formatter(PercentFormatter(1.0, decimals=0))
    ax2.set_xlabel("episode")
    ax2.set_ylim(bottom=0)
    ax2.grid(alpha=0.3)
    ax2.legend(fontsize=style.FONT_SIZE - 1, loc="upper right")
    return _save_learning(fig, path)


def _plain_log_ticks(axis) -> None:
    """Decades written as plain text ("1e6"): figures draw without mathtext."""
    from matplotlib.ticker import FuncFormatter, NullFormatter

    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.0e}".replace("e+0", "e").replace("e+", "e")))
    axis.set_minor_formatter(NullFormatter())


def _sweep_value_panel(ax, swept: dict, title: str | None) -> None:
    """Learners trained in sweeps: each seed's greedy value at the start at each check.

    The mean over seeds as a line and the range over seeds as a band, against the
    updates made (all seeds together), on the axis the P(incident) panel shares.
    """
    for name, result in swept.items():
        look = style.POLICY[name]
        values = np.asarray(result.check_value, dtype=float)
        x = np.asarray(result.check_updates, dtype=float)
        if values.size == 0:
            continue
        ax.fill_between(x, values.min(axis=0), values.max(axis=0), color=look["color"], alpha=0.18, lw=0)
        ax.plot(x, values.mean(axis=0), color=look["color"], ls=look["linestyle"], lw=1.6,
                label=f"{look['label']}: mean of {values.shape[0]} seeds")
    ax.set_xscale("log")
    _plain_log_ticks(ax.xaxis)
    ax.set_ylabel("greedy value at the start\n(m-equiv., minus the cost)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=style.FONT_SIZE - 1, loc="best")
    if title:
        ax.set_title(title, loc="left", fontsize=style.FONT_SIZE + 2)


def _sweep_panel(ax, swept: dict, title: str | None) -> None:
    """Learners trained in sweeps.

    The consensus policy's exact P(incident) at each check of the stopping rule, against
    the updates made (all seeds together).
    """
    for name, result in swept.items():
        look = style.POLICY[name]
        p = np.asarray(result.check_p_incident, dtype=float)
        x = np.asarray(result.check_updates, dtype=float)
        ax.plot(x, np.maximum(p, 1e-12), color=look["color"], ls=look["linestyle"], lw=1.6, marker="o", ms=3.5,
                label=f"{look['label']}: {result.q.shape[0]} seeds, "
                      + (f"verdict converged at {x[-1]:.2g} updates" if result.stopped_by_rule and x.size
                         else "not converged, whole budget used"))
    ax.set_xscale("log")
    ax.set_yscale("log")
    from matplotlib.ticker import FuncFormatter

    from planner.notation import percent

    # probabilities in the one notation; minor ticks labelled only when no decade is in view
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: percent(v)))
    shown = [p for r in swept.values() for p in np.asarray(r.check_p_incident, dtype=float) if np.isfinite(p)]
    if shown and max(shown) < 10 * max(min(shown), 1e-12):
        ax.yaxis.set_minor_formatter(FuncFormatter(lambda v, _: percent(v)))
    _plain_log_ticks(ax.xaxis)
    ax.set_xlabel("updates (one sampled transition each, all seeds)")
    ax.set_ylabel("P(incident) of the\ngreedy policy (exact)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=style.FONT_SIZE - 1, loc="best")
    if title:
        ax.set_title(title, loc="left", fontsize=style.FONT_SIZE + 2)


def _save_learning(fig, path) -> Path:
    fig.text(0.01, 0.005, style.FIGURE_NOTICE + "; band = range over seeds", fontsize=style.FONT_SIZE - 2,
             color="#666666")
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path, dpi=style.FIGURE_DPI, metadata={"Software": None}, bbox_inches="tight", pad_inches=0.12)
    plt.close(fig)
    return path


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


def _route_handles(routes: dict) -> list:
    return [Line2D([], [], color=style.ROUTE[n]["color"], ls=style.ROUTE[n]["linestyle"], lw=2.2,
                   label=f"{style.ROUTE[n]['label']}: {routes[n].length_m:.0f} m") for n in routes]


@_styled
def figure_routes(site, grid: Grid, routes: dict, *, title: str | None = None):
    """The figure of :func:`plot_routes`, not yet saved."""
    handles = _route_handles(routes) + site_legend_handles(grid, site)
    fig, ax = _new_axes(grid, title or f"{site.name} - nominal routes", n_legend_rows=_legend_rows(len(handles)) + 1)
    draw_routes(ax, grid, routes)
    draw_site(ax, grid, site)
    return _finish(fig, ax, handles, grid, site)


@_styled
def plot_routes(site, grid: Grid, routes: dict, path, *, title: str | None = None) -> Path:
    """The site with both nominal routes and their waypoints; drift arrows drawn above them."""
    return _save(figure_routes(site, grid, routes, title=title), path)


def risk_colour_scale(floor: float = style.RISK_FLOOR):
    """The risk maps' colour scale: log P(incident) from ``floor`` to 1, and its colour map."""
    from matplotlib.colors import LogNorm

    return LogNorm(vmin=floor, vmax=1.0), plt.get_cmap(style.RISK_CMAP)


def _probability_ticks(axis_values) -> list[str]:
    from planner.notation import one_in

    return ["certain" if v >= 1.0 else one_in(v) for v in axis_values]


@_styled
def plot_risk_maps(site, grid: Grid, maps: dict, routes: dict, path, *, noise: float) -> Path:
    """P(incident) if the vehicle were in each cell, for each policy, on a log colour scale.

    See :func:`figure_risk_maps`.
    """
    return _save(figure_risk_maps(site, grid, maps, routes, noise=noise), path)


@_styled
def figure_risk_maps(site, grid: Grid, maps: dict, routes: dict, *, noise: float):
    """P(incident) if the vehicle were in each cell, for each policy, on a log colour scale.

    Hazards are drawn apart from the scale (white, hatched, outlined); cells below the
    scale's floor get a colour of their own, named in the legend.
    """
    from planner.notation import one_in

    names = list(maps)
    n_rows, n_cols = grid.shape
    width = style.MAP_WIDTH_IN
    panel_w = (width - 1.4) / len(names)
    panel_h = panel_w * n_rows / max(n_cols, 1)
    fig = plt.figure(figsize=(width, panel_h + 2.0), dpi=style.FIGURE_DPI)
    height = panel_h + 2.0
    norm, cmap = risk_colour_scale()
    floor = norm.vmin
    image = None
    axes = []
    for k, name in enumerate(names):
        ax = fig.add_axes([(0.55 + k * (panel_w + 0.12)) / width, 1.15 / height, panel_w / width, panel_h / height])
        axes.append(ax)
        values = np.asarray(maps[name], dtype=float).reshape(grid.shape)
        usable = np.isfinite(values)
        below = usable & (values < floor)
        background = np.where(grid.label == OUTSIDE, 0, 1)
        ax.imshow(background, origin="lower", extent=_extent(grid), interpolation="nearest", zorder=Z_CELLS,
                  cmap=ListedColormap([style.OUTSIDE, style.RISK_BELOW_FLOOR]), vmin=0, vmax=1)
        shown = np.ma.masked_where(~usable | below, values)
        image = ax.imshow(shown, origin="lower", extent=_extent(grid), cmap=cmap, norm=norm,
                          interpolation="nearest", zorder=Z_CELLS + 0.5)
        _hatch_cells(ax, grid, ending_hazard_cells(grid), face=style.RISK_HAZARD, hatch_color=style.RISK_HAZARD_EDGE,
                     edge=style.RISK_HAZARD_EDGE)
        draw_site(ax, grid, None, drift_arrows=False, cells=False)
        if name in routes:
            draw_routes(ax, grid, {name: routes[name]}, waypoints=False)
        ax.set_title(f"{style.ROUTE.get(name, {'label': name})['label']}", loc="left",
                     fontsize=style.FONT_SIZE + 1)
        ax.set_aspect("equal")
        ax.set_xlabel("east (m)")
        if k:
            ax.tick_params(labelleft=False)
    axes[0].set_ylabel("north (m)")
    add_scale_bar(axes[0], grid)
    add_north_arrow(axes[-1], grid)
    cax = fig.add_axes([(width - 0.62) / width, 1.15 / height, 0.13 / width, panel_h / height])
    bar = fig.colorbar(image, cax=cax)
    ticks = [t for t in (1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1.0) if t >= floor]
    bar.set_ticks(ticks, labels=_probability_ticks(ticks))
    bar.ax.tick_params(labelsize=style.FONT_SIZE - 2)
    bar.set_label("P(incident before the goal), log scale", fontsize=style.FONT_SIZE - 1)
    fig.text(0.55 / width, 1.0 - 0.12 / height,
             f"{site.name} - if the vehicle were here: the chance that a run from this cell ends in an incident",
             fontsize=style.FONT_SIZE + 1, ha="left", va="top", color=style.TEXT)
    fig.text(0.55 / width, 1.0 - 0.36 / height,
             f"each policy executed with noise {noise:g} (share of moves made at random); {style.FIGURE_NOTICE}",
             fontsize=style.FONT_SIZE - 2, ha="left", va="top", color=style.MUTED)
    handles = [Patch(fc=style.RISK_HAZARD, ec=style.RISK_HAZARD_EDGE, hatch=style.HAZARD_HATCH,
                     hatchcolor=style.RISK_HAZARD_EDGE, label="hazard that ends the run (not on the scale)"),
               Patch(fc=style.RISK_BELOW_FLOOR, ec="#999999", label=f"below {one_in(floor)}"),
               Patch(fc=style.OUTSIDE, label="outside boundary")]
    handles += _route_handles({n: routes[n] for n in names if n in routes})
    fig.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.55 / width, 0.02), ncol=3,
               fontsize=style.FONT_SIZE - 1, frameon=False)
    return fig


@_styled
def plot_sensitivity(rows, path, *, title: str = "Sensitivity of the incident probability") -> Path:
    """P(incident) against execution noise (see :func:`figure_sensitivity`)."""
    return _save(figure_sensitivity(rows, title=title), path)


@_styled
def figure_sensitivity(rows, *, title: str = "Sensitivity of the incident probability"):
    """P(incident) against execution noise, learned policies and exact references apart.

    The learned policies in one panel, the exact references in their own, one line per
    policy and drift scale, labelled at its end.

    Values below the notation's floor (1 in 10^12) are drawn on a floor line of their
    own with open markers, never as if they were the floor value.
    """
    from planner.budget_plan import ROUTE_LABEL, ROUTE_NAME
    from planner.notation import FLOOR, FLOOR_TEXT, one_in

    panels = [("learned policies", ("cautious", "shortest")), ("exact references", ("exact on-policy",
                                                                                    "exact optimal", ROUTE_NAME))]
    looks = {"cautious": style.POLICY["cautious"], "shortest": style.POLICY["shortest"],
             "exact on-policy": style.REFERENCE["cautious"], "exact optimal": style.REFERENCE["shortest"],
             ROUTE_NAME: style.BUDGET}
    panels = [(t, [n for n in names if any(r.policy == n for r in rows)]) for t, names in panels]
    panels = [(f"{t} and the {ROUTE_LABEL} route" if ROUTE_NAME in names else t, names) for t, names in panels]
    panels = [(t, names) for t, names in panels if names]
    scales = sorted({r.drift_scale for r in rows})
    # fewer series: the planning scale and the strongest tabulated one
    shown_scales = scales if len(scales) <= 2 else [scales[0], scales[-1]]
    widths = {m: 1.2 + 1.2 * i for i, m in enumerate(shown_scales)}
    positive = [r.p_incident for r in rows if r.p_incident >= FLOOR]
    low = min(positive, default=1e-6)
    bottom = 10 ** (math.floor(math.log10(low)) - 1)
    floor_y = bottom / 3
    fig, axes = plt.subplots(1, len(panels), figsize=(style.MAP_WIDTH_IN, 3.9), dpi=style.FIGURE_DPI,
                             sharey=True, squeeze=False)
    pending = []
    for ax, (panel_title, names) in zip(axes[0], panels, strict=True):
        labels = []
        for name in names:
            look = looks[name]
            for m in shown_scales:
                sel = sorted((r for r in rows if r.policy == name and r.drift_scale == m), key=lambda r: r.noise)
                if not sel:
                    continue
                x = np.array([r.noise for r in sel])
                p = np.array([r.p_incident for r in sel])
                under = p < FLOOR
                y = np.where(under, floor_y, p)
                ax.plot(x, y, color=look["color"], ls=look["linestyle"] if m == shown_scales[0] else "-",
                        lw=widths[m], zorder=3)
                ax.plot(x[~under], y[~under], "o", color=look["color"], ms=3.5, zorder=4)
                ax.plot(x[under], y[under], "o", mfc="white", mec=look["color"], ms=4.5, zorder=4)
                shown = ROUTE_LABEL if name == ROUTE_NAME else name
                labels.append((y[-1], f"{shown}, drift x{m:g}", look["color"], x[-1]))
        pending.append((ax, labels))
        ax.set_yscale("log")
        ax.set_ylim(floor_y / 3, 1.5)
        ax.axhline(floor_y, color=style.MUTED, lw=0.6, ls=(0, (2, 2)), zorder=1)
        ax.set_title(panel_title, loc="left", fontsize=style.FONT_SIZE + 1)
        ax.set_xlabel("execution noise")
        ax.grid(alpha=0.3, which="major")
        ax.set_xlim(min(r.noise for r in rows), max(r.noise for r in rows) * 1.45 + 1e-9)
    ax0 = axes[0][0]
    ticks = [10.0 ** k for k in range(int(math.log10(bottom)), 1)]
    ticks = ticks[::-1][::max(1, -(-len(ticks) // 6))][::-1]  # at most about six decades labelled
    ax0.set_yticks([floor_y] + ticks, labels=[FLOOR_TEXT] + ["certain" if t >= 1 else one_in(t) for t in ticks])
    ax0.set_ylabel("P(incident before the goal)")
    ax0.minorticks_off()
    fig.suptitle(title, x=0.01, ha="left", fontsize=style.FONT_SIZE + 2)
    fig.text(0.01, 0.005, f"{style.FIGURE_NOTICE}. Execution noise: share of moves made at random; thicker lines: "
             f"drift x{shown_scales[-1]:g}.\nOpen markers on the dashed line: under 1 in 10^12 (the axis is broken "
             "above it).", fontsize=style.FONT_SIZE - 2, color=style.MUTED)
    fig.tight_layout(rect=(0, 0.06, 1, 1))
    # labels last: their positions depend on the final scales and layout
    for ax, labels in pending:
        _direct_labels(ax, labels)
    return fig


def _direct_labels(ax, labels):
    """Label each line at its right end, nudging labels apart so none overlap."""
    if not labels:
        return
    labels = sorted(labels, key=lambda t: t[0])
    fig = ax.figure
    renderer = fig.canvas.get_renderer()
    placed = []
    for y, text, color, x in labels:
        artist = ax.annotate(text, (x, y), xytext=(6, 0), textcoords="offset points", va="center", ha="left",
                             fontsize=style.FONT_SIZE - 2, color=color, gid=LABEL_GID, annotation_clip=False)
        for _ in range(40):
            box = artist.get_window_extent(renderer)
            if not any(_boxes_overlap(box, other) for other in placed):
                break
            dx, dy = artist.xyann
            artist.xyann = (dx, dy + 3.0)
        placed.append(artist.get_window_extent(renderer))
