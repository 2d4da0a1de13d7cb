"""Figures of risk: the risk maps and the sensitivity chart.

``riskmap.png``: P(incident) if the vehicle were in each cell, one panel per policy,
on a log colour scale, drawn over the map layers of :mod:`planner.plots`.
``sensitivity.png``: P(incident) against execution noise for every policy and drift
scale of the risk table, each line labelled at its end. Both take finished results
(risk maps, ``planner.risk.RiskRow``) and a path, draw one PNG and return the path.
"""

from __future__ import annotations

import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import ListedColormap  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402

from planner import plots, style  # noqa: E402
from planner.grid import OUTSIDE, Grid  # noqa: E402


def risk_colour_scale(floor: float = style.RISK_FLOOR):
    """The risk maps' colour scale: log P(incident) from ``floor`` to 1, and its colour map."""
    from matplotlib.colors import LogNorm

    return LogNorm(vmin=floor, vmax=1.0), plt.get_cmap(style.RISK_CMAP)


def _probability_ticks(axis_values) -> list[str]:
    from planner.notation import one_in

    return ["certain" if v >= 1.0 else one_in(v) for v in axis_values]


@plots.styled
def plot_risk_maps(site, grid: Grid, maps: dict, routes: dict, path, *, noise: float) -> Path:
    """P(incident) if the vehicle were in each cell, for each policy, on a log colour scale.

    See :func:`figure_risk_maps`.
    """
    return plots.save(figure_risk_maps(site, grid, maps, routes, noise=noise), path)


@plots.styled
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
        ax.imshow(background, origin="lower", extent=plots.map_extent(grid), interpolation="nearest",
                  zorder=plots.Z_CELLS,
                  cmap=ListedColormap([style.OUTSIDE, style.RISK_BELOW_FLOOR]), vmin=0, vmax=1)
        shown = np.ma.masked_where(~usable | below, values)
        image = ax.imshow(shown, origin="lower", extent=plots.map_extent(grid), cmap=cmap, norm=norm,
                          interpolation="nearest", zorder=plots.Z_CELLS + 0.5)
        plots.hatch_cells(ax, grid, plots.ending_hazard_cells(grid), face=style.RISK_HAZARD,
                          hatch_color=style.RISK_HAZARD_EDGE, edge=style.RISK_HAZARD_EDGE)
        plots.draw_site(ax, grid, None, drift_arrows=False, cells=False)
        if name in routes:
            plots.draw_routes(ax, grid, {name: routes[name]}, waypoints=False)
        ax.set_title(f"{style.ROUTE.get(name, {'label': name})['label']}", loc="left",
                     fontsize=style.FONT_SIZE + 1)
        ax.set_aspect("equal")
        ax.set_xlabel("east (m)")
        if k:
            ax.tick_params(labelleft=False)
    axes[0].set_ylabel("north (m)")
    plots.add_scale_bar(axes[0], grid)
    plots.add_north_arrow(axes[-1], grid)
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
    handles += plots.route_handles({n: routes[n] for n in names if n in routes})
    fig.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.55 / width, 0.02), ncol=3,
               fontsize=style.FONT_SIZE - 1, frameon=False)
    return fig


@plots.styled
def plot_sensitivity(rows, path, *, title: str = "Sensitivity of the incident probability") -> Path:
    """P(incident) against execution noise (see :func:`figure_sensitivity`)."""
    return plots.save(figure_sensitivity(rows, title=title), path)


@plots.styled
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
                             fontsize=style.FONT_SIZE - 2, color=color, gid=plots.LABEL_GID, annotation_clip=False)
        for _ in range(40):
            box = artist.get_window_extent(renderer)
            if not any(plots.boxes_overlap(box, other) for other in placed):
                break
            dx, dy = artist.xyann
            artist.xyann = (dx, dy + 3.0)
        placed.append(artist.get_window_extent(renderer))
