"""Figures: every picture yardplan draws, with matplotlib's Agg backend.

Each function takes finished results and a path, draws one PNG, and returns the path.
Colours and symbols come from ``planner.style``.
"""

from __future__ import annotations

import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import ListedColormap  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402

from planner import style  # noqa: E402
from planner.grid import OUTSIDE, Grid  # noqa: E402


def _new_axes(grid: Grid, title: str, width_in: float = 7.5):
    n_rows, n_cols = grid.shape
    aspect = n_rows / max(n_cols, 1)
    fig, ax = plt.subplots(figsize=(width_in, max(3.0, width_in * aspect * 0.92 + 0.8)), dpi=style.FIGURE_DPI)
    plt.rcParams.update({"font.size": style.FONT_SIZE})
    ax.set_title(title, fontsize=style.FONT_SIZE + 2, loc="left", color=style.TEXT)
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


def draw_site(ax, grid: Grid, site=None, *, drift_arrows: bool = True, labels: bool = True, alpha: float = 1.0):
    """Draw the labelled grid, zone outlines, buffers, drift arrows, start and goal."""
    cat, cmap = _category_image(grid)
    ax.imshow(cat, origin="lower", extent=_extent(grid), cmap=cmap, vmin=0, vmax=5, interpolation="nearest",
              alpha=alpha)
    if site is not None:
        _outline(ax, site.boundary, color=style.TEXT, lw=1.0)
        for zone in site.hazards:
            _outline(ax, zone.geometry, color=style.HAZARD, lw=0.9)
            if zone.buffer_m > 0:
                _outline(ax, zone.buffered, color=style.BUFFER_EDGE, lw=0.8, ls=(0, (3, 2)))
        for zone in site.drifts:
            _outline(ax, zone.geometry, color=style.DRIFT, lw=0.8, ls=(0, (1, 1.5)))
        if labels:
            for zone in site.zones:
                p = zone.geometry.representative_point()
                ax.annotate(zone.name, (p.x, p.y), fontsize=style.FONT_SIZE - 2, ha="center", va="center",
                            color=style.TEXT, bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none",
                                                    "alpha": 0.7})
    if drift_arrows and grid.drifts:
        _drift_arrows(ax, grid)
    xs, ys = grid.centres()
    r, c = grid.start
    ax.plot(xs[r, c], ys[r, c], style.START_MARKER, color=style.START, ms=10, mec="white", mew=1.2, zorder=6)
    goal_r, goal_c = np.nonzero(grid.goal)
    ax.plot(xs[goal_r, goal_c].mean(), ys[goal_r, goal_c].mean(), style.GOAL_MARKER, color=style.GOAL, ms=9,
            mec="white", mew=1.2, zorder=6)
    x0, x1, y0, y1 = _extent(grid)
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)


def _outline(ax, geometry, *, color, lw, ls="-"):
    for poly in getattr(geometry, "geoms", [geometry]):
        x, y = poly.exterior.xy
        ax.plot(x, y, color=color, lw=lw, ls=ls, zorder=4)
        for ring in poly.interiors:
            x, y = ring.xy
            ax.plot(x, y, color=color, lw=lw, ls=ls, zorder=4)


def _drift_arrows(ax, grid: Grid):
    """Arrows on a coarse lattice of drift cells: direction and length show the mean push."""
    n_rows, n_cols = grid.shape
    step = max(1, int(round(max(n_rows, n_cols) / 18)))
    xs, ys = grid.centres()
    east = np.zeros(grid.shape)
    north = np.zeros(grid.shape)
    for k, members in enumerate(grid.drift_members):
        if not members:
            continue
        mask = grid.drift_class == k
        east[mask] = sum(grid.drifts[m].east_m * grid.drifts[m].chance for m in members)
        north[mask] = sum(grid.drifts[m].north_m * grid.drifts[m].chance for m in members)
    sel = np.zeros(grid.shape, dtype=bool)
    sel[step // 2::step, step // 2::step] = True
    sel &= (np.hypot(east, north) > 0) & (grid.label != OUTSIDE)
    if not sel.any():
        return
    ax.quiver(xs[sel], ys[sel], east[sel], north[sel], color=style.DRIFT, angles="xy", scale_units="xy",
              scale=1.0 / (step * grid.cell_m * 0.25), width=0.004, zorder=5)


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
    ax.plot([bx, bx + length], [by, by], color="black", lw=3, solid_capstyle="butt", zorder=8)
    ax.plot([bx, bx + length], [by, by], color="white", lw=1, solid_capstyle="butt", zorder=8)
    ax.text(bx + length / 2, by + 0.02 * (y1 - y0), f"{length:g} m", ha="center", va="bottom", zorder=8,
            fontsize=style.FONT_SIZE, bbox={"fc": "white", "ec": "none", "alpha": 0.7, "pad": 1})


def add_north_arrow(ax, grid: Grid):
    """A north arrow, upper right (the working frame's y axis points to grid north)."""
    x0, x1, y0, y1 = _extent(grid)
    x, y = x1 - 0.05 * (x1 - x0), y1 - 0.16 * (y1 - y0)
    ax.annotate("N", xy=(x, y1 - 0.04 * (y1 - y0)), xytext=(x, y), ha="center", va="top", zorder=8,
                fontsize=style.FONT_SIZE + 1, fontweight="bold",
                arrowprops={"arrowstyle": "-|>", "color": "black", "lw": 1.5})


def site_legend_handles(grid: Grid, site=None) -> list:
    handles = [Patch(fc=style.FREE, ec="#999999", label="open ground"),
               Patch(fc=style.HAZARD, label="hazard (ends run)")]
    if any(not h.ends_run for h in grid.hazards):
        handles.append(Patch(fc=style.HAZARD_SOFT, label="hazard (penalty, run goes on)"))
    if site is not None and any(z.buffer_m > 0 for z in site.hazards):
        handles.append(Line2D([], [], color=style.BUFFER_EDGE, ls=(0, (3, 2)), label="hazard buffer"))
    if (grid.cost_factor > 1).any():
        handles.append(Patch(fc=style.ROUGH, label="rough (costs more)"))
    if grid.drifts:
        handles.append(Line2D([], [], color=style.DRIFT, marker=r"$\rightarrow$", ls="none", ms=12,
                              label="drift (mean push)"))
    handles += [Patch(fc=style.OUTSIDE, label="outside boundary"),
                Line2D([], [], marker=style.START_MARKER, color=style.START, ls="none", ms=8, label="start"),
                Line2D([], [], marker=style.GOAL_MARKER, color=style.GOAL, ls="none", ms=8, label="goal")]
    return handles


def _finish(fig, ax, path, handles, grid):
    add_scale_bar(ax, grid)
    add_north_arrow(ax, grid)
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=style.FONT_SIZE - 1,
              frameon=False)
    fig.text(0.01, 0.005, style.FIGURE_NOTICE, fontsize=style.FONT_SIZE - 2, color="#666666")
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path, dpi=style.FIGURE_DPI, metadata={"Software": None})
    plt.close(fig)
    return path


def plot_grid(site, grid: Grid, path) -> Path:
    """The labelled grid of a site: zones, buffers, drift arrows, start, goal, legend,
    scale bar and north arrow."""
    title = f"{site.name} - grid {grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m"
    fig, ax = _new_axes(grid, title)
    draw_site(ax, grid, site)
    return _finish(fig, ax, path, site_legend_handles(grid, site), grid)
