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
from matplotlib.colors import ListedColormap  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402

from planner import style  # noqa: E402
from planner.grid import OUTSIDE, Grid  # noqa: E402


def _styled(draw):
    """Draw with our settings in a private matplotlib context (nothing global changes,
    so a figure never depends on what the process drew before)."""

    @functools.wraps(draw)
    def wrapper(*args, **kwargs):
        # Names from the site file are text, never TeX or mathtext ("$x$", "\\" stay as drawn).
        with plt.rc_context({"font.size": style.FONT_SIZE, "svg.hashsalt": "veerwise", "text.usetex": False,
                             "text.parse_math": False}):
            return draw(*args, **kwargs)

    return wrapper


def _new_axes(grid: Grid, title: str, width_in: float = 7.5):
    n_rows, n_cols = grid.shape
    aspect = n_rows / max(n_cols, 1)
    fig, ax = plt.subplots(figsize=(width_in, max(3.0, width_in * aspect * 0.92 + 0.8)), dpi=style.FIGURE_DPI)
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
    fig.savefig(path, dpi=style.FIGURE_DPI, metadata={"Software": None}, bbox_inches="tight", pad_inches=0.12)
    plt.close(fig)
    return path


@_styled
def plot_grid(site, grid: Grid, path) -> Path:
    """The labelled grid of a site: zones, buffers, drift arrows, start, goal, legend,
    scale bar and north arrow."""
    title = f"{site.name} - grid {grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m"
    fig, ax = _new_axes(grid, title)
    draw_site(ax, grid, site)
    return _finish(fig, ax, path, site_legend_handles(grid, site), grid)


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
    """Return per episode (moving average; mean and min-max band over seeds) for both
    learners, and hazard incidents per episode during training."""
    episodic = {n: r for n, r in learned.items() if r.settings.schedule == "episodes"}
    swept = {n: r for n, r in learned.items() if r.settings.schedule == "sweeps"}
    rows = (2 if episodic else 0) + (1 if swept else 0)
    fig, axes = plt.subplots(rows, 1, figsize=(7.5, 6.2 if episodic else 3.4) if not (episodic and swept)
                             else (7.5, 8.4), dpi=style.FIGURE_DPI,
                             gridspec_kw={"height_ratios": ([2.2, 1.0] if episodic else []) + ([1.4] if swept else [])})
    axes = np.atleast_1d(axes)
    if swept:
        _sweep_panel(axes[-1], swept, title if not episodic else None)
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
    ax2.set_xlabel("episode")
    ax2.set_ylim(bottom=0)
    ax2.grid(alpha=0.3)
    ax2.legend(fontsize=style.FONT_SIZE - 1, loc="upper right")
    return _save_learning(fig, path)


def _sweep_panel(ax, swept: dict, title: str | None) -> None:
    """Learners trained in sweeps: the consensus policy's exact P(incident) at each check
    of the stopping rule, against the updates made (all seeds together)."""
    for name, result in swept.items():
        look = style.POLICY[name]
        p = np.asarray(result.check_p_incident, dtype=float)
        x = np.asarray(result.check_updates, dtype=float)
        ax.plot(x, np.maximum(p, 1e-12), color=look["color"], ls=look["linestyle"], lw=1.6, marker="o", ms=3.5,
                label=f"{look['label']}: {result.q.shape[0]} seeds, "
                      + ("stopped when its verdict passed" if result.stopped_by_rule else "whole budget used"))
    ax.set_xscale("log")
    ax.set_yscale("log")
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
    for name, route in routes.items():
        look = style.POLICY[name]
        xy = np.asarray(route.path_m, dtype=float)
        ax.plot(xy[:, 0], xy[:, 1], color=look["color"], ls=look["linestyle"], lw=2.2, zorder=7,
                label=f"{look['label']}: {route.length_m:.0f} m")
        if waypoints and route.waypoints:
            wx = [w.east_m for w in route.waypoints]
            wy = [w.north_m for w in route.waypoints]
            ax.plot(wx, wy, "o", color=look["color"], ms=3.5, mec="white", mew=0.6, zorder=7)


@_styled
def plot_routes(site, grid: Grid, routes: dict, greedy: dict, path, *, title: str | None = None,
                where: np.ndarray | None = None) -> Path:
    """The site with both nominal routes and the cells where the two policies differ.

    ``where`` (bool, one per cell) limits the differences shown to cells the policies
    actually visit; elsewhere a difference changes nothing a run would do.
    """
    fig, ax = _new_axes(grid, title or f"{site.name} - nominal routes")
    draw_site(ax, grid, site, alpha=0.75)
    names = list(greedy)
    handles = []
    if len(names) == 2:
        active = grid.passable() & ~grid.goal
        differ = (greedy[names[0]].reshape(grid.shape) != greedy[names[1]].reshape(grid.shape)) & active
        if where is not None:
            differ &= np.asarray(where, dtype=bool).reshape(grid.shape)
        xs, ys = grid.centres()
        ax.scatter(xs[differ], ys[differ], s=max(1.0, 900.0 / max(grid.shape)), marker="s", color=style.DISAGREE,
                   alpha=0.22, lw=0, zorder=3)
        handles.append(Patch(fc=style.DISAGREE, alpha=0.35,
                             label=f"policies choose differently ({int(differ.sum()):,} visited cells)"))
    draw_routes(ax, grid, routes)
    route_handles = [Line2D([], [], color=style.POLICY[n]["color"], ls=style.POLICY[n]["linestyle"], lw=2.2,
                            label=f"{style.POLICY[n]['label']}: {routes[n].length_m:.0f} m") for n in routes]
    return _finish(fig, ax, path, route_handles + handles + site_legend_handles(grid, site), grid)


@_styled
def plot_risk_maps(site, grid: Grid, maps: dict, routes: dict, path, *, noise: float) -> Path:
    """Per-cell incident probability for each policy on a log colour scale, with routes."""
    from matplotlib.colors import LogNorm

    names = list(maps)
    n_rows, n_cols = grid.shape
    width = 7.5
    panel_h = width / len(names) * n_rows / max(n_cols, 1) + 0.9
    fig, axes = plt.subplots(1, len(names), figsize=(width + 1.2, max(3.2, panel_h + 0.6)), dpi=style.FIGURE_DPI,
                             squeeze=False)
    floor = 1e-6
    norm = LogNorm(vmin=floor, vmax=1.0)
    image = None
    for ax, name in zip(axes[0], names, strict=True):
        draw_site(ax, grid, site, drift_arrows=False, labels=False, alpha=0.5)
        values = np.asarray(maps[name], dtype=float).reshape(grid.shape)
        shown = np.ma.masked_invalid(np.where(values > 0, np.maximum(values, floor), np.nan))
        image = ax.imshow(shown, origin="lower", extent=_extent(grid), cmap=style.RISK_CMAP, norm=norm,
                          interpolation="nearest", alpha=0.85, zorder=2)
        if name in routes:
            draw_routes(ax, grid, {name: routes[name]}, waypoints=False)
        ax.set_title(f"{style.POLICY.get(name, {'label': name})['label']}", loc="left",
                     fontsize=style.FONT_SIZE + 1)
        ax.set_aspect("equal")
        ax.set_xlabel("east (m)")
    axes[0][0].set_ylabel("north (m)")
    add_scale_bar(axes[0][0], grid)
    add_north_arrow(axes[0][-1], grid)
    bar = fig.colorbar(image, ax=axes[0].tolist(), shrink=0.85, pad=0.02)
    bar.set_label(f"P(incident before goal) from each cell, noise {noise:g} (log scale)")
    fig.suptitle(f"{site.name} - risk maps", x=0.01, ha="left", fontsize=style.FONT_SIZE + 2)
    fig.text(0.01, 0.005, style.FIGURE_NOTICE + "; blank cells: below 1e-6 or not usable",
             fontsize=style.FONT_SIZE - 2, color="#666666")
    path = Path(path)
    fig.savefig(path, dpi=style.FIGURE_DPI, metadata={"Software": None}, bbox_inches="tight", pad_inches=0.12)
    plt.close(fig)
    return path


@_styled
def plot_sensitivity(rows, path, *, title: str = "Sensitivity of the incident probability") -> Path:
    """P(incident) against execution noise, one line per policy and drift scale."""
    fig, ax = plt.subplots(figsize=(7.5, 4.2), dpi=style.FIGURE_DPI)
    looks = {"cautious": style.POLICY["cautious"], "shortest": style.POLICY["shortest"],
             "exact on-policy": style.REFERENCE["cautious"], "exact optimal": style.REFERENCE["shortest"]}
    scales = sorted({r.drift_scale for r in rows})
    widths = {m: 1.0 + 0.9 * i for i, m in enumerate(scales)}
    markers = {m: mk for m, mk in zip(scales, ["o", "s", "^", "v", "D"] * 4, strict=False)}
    floor = 1e-7
    for name in [n for n in looks if any(r.policy == n for r in rows)]:
        for m in scales:
            sel = sorted((r for r in rows if r.policy == name and r.drift_scale == m), key=lambda r: r.noise)
            if not sel:
                continue
            look = looks[name]
            ax.plot([r.noise for r in sel], [max(r.p_incident, floor) for r in sel], color=look["color"],
                    ls=look["linestyle"], lw=widths[m], marker=markers[m], ms=4,
                    label=f"{look['label']}, drift x{m:g}")
    ax.set_yscale("log")
    ax.set_xlabel("execution noise epsilon (share of moves made at random)")
    ax.set_ylabel("P(incident before goal)")
    ax.set_title(title, loc="left", fontsize=style.FONT_SIZE + 2)
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=style.FONT_SIZE - 2, ncol=2, loc="lower right")
    fig.text(0.01, 0.005, style.FIGURE_NOTICE + f"; values below {floor:g} drawn at {floor:g}",
             fontsize=style.FONT_SIZE - 2, color="#666666")
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path, dpi=style.FIGURE_DPI, metadata={"Software": None}, bbox_inches="tight", pad_inches=0.12)
    plt.close(fig)
    return path
