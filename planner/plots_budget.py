"""Figures of the risk budget: the trade-off curve, and where each route's risk comes from.

Drawn over the map layers of :mod:`planner.plots`, whose helpers these reuse. Each
function takes the plain records of :mod:`planner.budget_plan`, as they are stored in
``risk.json``, and a path, draws one PNG and returns the path.
"""

from __future__ import annotations

import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.ticker import FuncFormatter, MaxNLocator  # noqa: E402

from planner import plots, style  # noqa: E402
from planner.budget_plan import ROUTE_NAME  # noqa: E402
from planner.notation import FLOOR, one_in, percent  # noqa: E402

#: The leg bars' axis: each bar is the P(incident) that leg contributes (the bars sum to
#: the route's), not a share of it; the share is the label on the largest bar.
CAUSE_AXIS_LABEL = "P(incident) from this leg"

#: Order in which routes are drawn and listed.
ROUTE_ORDER = ("cautious", "shortest", ROUTE_NAME)
#: Marker of each delivered route on the trade-off curve.
ROUTE_MARKER = {"cautious": "o", "shortest": "s", ROUTE_NAME: "D"}


def _label(name: str) -> str:
    return style.ROUTE.get(name, {"label": name})["label"]


def _prob_axis(ax, values) -> None:
    """A log P(incident) axis labelled "1 in N", spanning ``values``."""
    positive = [v for v in values if v >= FLOOR]
    low = min(positive, default=1e-6)
    high = max(positive, default=1.0)
    bottom = 10 ** (math.floor(math.log10(low)) - 0.3)
    top = min(1.5, 10 ** (math.ceil(math.log10(high)) + 0.3))
    ax.set_yscale("log")
    ax.set_ylim(bottom, top)
    ticks = [10.0 ** k for k in range(math.ceil(math.log10(bottom)), math.floor(math.log10(top)) + 1)]
    ticks = ticks[::-1][::max(1, -(-len(ticks) // 7))][::-1]
    ax.set_yticks(ticks, labels=["certain" if t >= 1 else one_in(t) for t in ticks])
    ax.minorticks_off()


@plots.styled
def figure_tradeoff(record: dict, causes: dict, *, title: str = "Length against risk"):
    """P(incident) (log scale) against expected length over the trade-off curve's vertices.

    The cautious, shortest and within-budget routes are marked where they lie, the
    budget is a horizontal line, and the mixed policy that would meet it exactly (the
    constrained optimum, which a vehicle cannot fly) is an open marker on the hull.
    """
    from planner.risk import format_prob

    curve = record["curve"]
    x = np.array([p["length_m"] for p in curve])
    y = np.array([max(p["p_incident"], FLOOR) for p in curve])
    fig, ax = plt.subplots(figsize=(style.MAP_WIDTH_IN, 5.0), dpi=style.FIGURE_DPI)
    ax.plot(x, y, color=style.MUTED, lw=1.0, zorder=2, label="lower convex hull (each vertex: one deterministic "
                                                                "policy, the optimum for one hazard penalty)")
    ax.plot(x, y, "o", color=style.MUTED, ms=3, zorder=3)
    budget = record["budget"]
    set_by = f", set by {record['set_by']}" if record.get("set_by") else ""
    ax.axhline(budget, color=style.BUDGET_LINE, lw=1.2, ls=(0, (4, 2)), zorder=1,
               label=f"risk budget {one_in(budget)}{set_by}")
    values = list(y) + [budget]
    for name in ROUTE_ORDER:
        c = causes.get(name)
        if c is None or not math.isfinite(c.get("length_m", math.nan)):
            continue
        look = style.ROUTE[name]
        p = max(c["p_incident"], FLOOR)
        values.append(p)
        ax.plot([c["length_m"]], [p], ROUTE_MARKER[name], color=look["color"], ms=8, mec="white", mew=1.0,
                zorder=5, label=f"{_label(name)}: {c['length_m']:.1f} m-equiv., {format_prob(c['p_incident'])}")
    if record.get("mixed_length_m") is not None and record.get("met"):
        ax.plot([record["mixed_length_m"]], [budget], "o", mfc="white", mec=style.BUDGET_LINE, ms=7, zorder=4,
                label=f"mixed policy meeting the budget exactly (share {record['mix_share']:.3f} on the shorter "
                      "one): not flyable")
    _prob_axis(ax, values)
    ax.set_xlabel("expected length until the run ends (metres-equivalent, at the run's noise)")
    ax.set_ylabel("P(incident before the goal)")
    ax.grid(alpha=0.3, which="major")
    ax.set_title(title, loc="left", fontsize=style.FONT_SIZE + 2, color=style.TEXT)
    ax.set_title(style.FIGURE_NOTICE, loc="right", fontsize=style.FONT_SIZE - 2, color=style.MUTED)
    fig.text(0.01, 0.005, f"Every policy flown with execution noise {record['noise']:g} (share of moves made at "
             f"random) and drift x{record['drift_scale']:g}; {len(curve)} vertices from "
             f"{record['n_solves'] + record['n_solves_curve']} exact solves. Routes off the hull are learned "
             "policies.", fontsize=style.FONT_SIZE - 2, color=style.MUTED)
    fig.tight_layout(rect=(0, 0.28, 1, 1))
    ax.legend(loc="upper left", bbox_to_anchor=(0.0, -0.14), fontsize=style.FONT_SIZE - 2, frameon=False, ncol=1)
    return fig


@plots.styled
def plot_tradeoff(record: dict, causes: dict, path, *, title: str = "Length against risk") -> Path:
    """The trade-off figure (see :func:`figure_tradeoff`) saved to ``path``."""
    return plots.save(figure_tradeoff(record, causes, title=title), path)


def _draw_paths(ax, record: dict) -> None:
    """A route's likeliest failure paths: thin lines, numbered at their end, off-route moves circled."""
    ends: dict[tuple[float, float], list[str]] = {}
    for k, f in enumerate(record["paths"]):
        east, north = np.asarray(f["east_m"]), np.asarray(f["north_m"])
        ax.plot(east, north, color=style.FAILURE_PATH, lw=0.9, ls=(0, (2, 1)), zorder=plots.Z_ROUTE + 0.5,
                gid="failure-path")
        moves = [m - 1 for m in f["off_policy"] if 0 <= m - 1 < east.size]
        ax.plot(east[moves], north[moves], "o", mfc="white", mec=style.FAILURE_PATH, ms=2.6, mew=0.6,
                zorder=plots.Z_ROUTE + 0.6)
        ends.setdefault((float(east[-1]), float(north[-1])), []).append(str(k + 1))
    # paths that end in the same cell share one label ("1, 2")
    for (east, north), numbers in ends.items():
        ax.annotate(", ".join(numbers), (east, north), xytext=(2, 2), textcoords="offset points",
                    fontsize=style.FONT_SIZE - 2, color=style.FAILURE_PATH, fontweight="bold",
                    zorder=plots.Z_LABEL, gid=plots.LABEL_GID,
                    bbox={"fc": "white", "ec": "none", "alpha": 0.75, "pad": 0.5})


@plots.styled
def figure_causes(site, grid, routes: dict, causes: dict):
    """For each delivered route: its failure paths on the map, and its P(incident) by leg beside it.

    One column per route: the map (route, its waypoints, the likeliest failure paths
    numbered as in the briefing's list, the moves where noise or drift acted circled),
    and below it a bar per leg of the share of P(incident) whose run was last on the
    nominal route on that leg. The bars sum to the route's P(incident).
    """
    from planner.risk import format_prob

    names = [n for n in ROUTE_ORDER if n in routes and n in causes]
    n_rows, n_cols = grid.shape
    width = style.MAP_WIDTH_IN
    panel_w = (width - 0.9) / len(names)
    map_h = panel_w * n_rows / max(n_cols, 1)
    n_legs = max(len(causes[n]["legs"]) for n in names)
    bar_h = max(1.2, 0.13 * n_legs + 0.5)
    bars_bottom = 0.95  # legend, then the bars' axis labels
    map_bottom = bars_bottom + bar_h + 0.55
    height = map_bottom + map_h + 1.2  # the maps' two-line titles and the figure's heading
    fig = plt.figure(figsize=(width, height), dpi=style.FIGURE_DPI)
    for k, name in enumerate(names):
        left = (0.55 + k * (panel_w + 0.12)) / width
        ax = fig.add_axes([left, map_bottom / height, panel_w / width, map_h / height])
        plots.draw_site(ax, grid, site, drift_arrows=False)
        plots.draw_routes(ax, grid, {name: routes[name]})
        _draw_paths(ax, causes[name])
        ax.set_aspect("equal")
        ax.set_title(f"{_label(name)}\nP(incident) {format_prob(causes[name]['p_incident'])}", loc="left",
                     fontsize=style.FONT_SIZE - 1)
        ax.tick_params(labelsize=style.FONT_SIZE - 3)
        if k == 0:
            ax.set_ylabel("north (m)", fontsize=style.FONT_SIZE - 2)
            plots.add_scale_bar(ax, grid)
        ax.set_xlabel("east (m)", fontsize=style.FONT_SIZE - 2)
        if k == len(names) - 1:
            plots.add_north_arrow(ax, grid)
        bars = fig.add_axes([left + 0.35 / width, bars_bottom / height, (panel_w - 0.35) / width, bar_h / height])
        legs = causes[name]["legs"]
        share = np.array([leg["p_incident"] for leg in legs])
        ypos = np.arange(len(legs))
        bars.barh(ypos, share, color=style.ROUTE[name]["color"], height=0.7)
        bars.set_yticks(ypos, labels=[str(leg["leg"]) for leg in legs], fontsize=max(4, style.FONT_SIZE - 4))
        bars.invert_yaxis()
        bars.set_ylim(len(legs) - 0.4, -0.6)
        bars.tick_params(axis="x", labelsize=style.FONT_SIZE - 4)
        # the product's notation on the axis too (no exponent offset a reviewer must apply)
        bars.xaxis.set_major_locator(MaxNLocator(nbins=4, min_n_ticks=2))
        bars.xaxis.set_major_formatter(FuncFormatter(lambda v, _: percent(v) if v >= 0 else ""))
        bars.set_xlabel(CAUSE_AXIS_LABEL, fontsize=style.FONT_SIZE - 3)
        if k == 0:
            bars.set_ylabel("leg (from the start)", fontsize=style.FONT_SIZE - 3)
        top = int(np.argmax(share)) if share.size and share.max() > 0 else None
        if top is not None:
            bars.annotate(f"leg {legs[top]['leg']}: {100 * share[top] / max(share.sum(), 1e-300):.0f}%",
                          (share[top], top), xytext=(-2, 0), textcoords="offset points", ha="right",
                          va="center", fontsize=style.FONT_SIZE - 3, color="white", fontweight="bold")
    fig.text(0.55 / width, 1.0 - 0.1 / height, f"{site.name} - why each route is risky",
             fontsize=style.FONT_SIZE + 2, ha="left", va="top", color=style.TEXT)
    noise = causes[names[0]]["noise"]
    fig.text(0.55 / width, 1.0 - 0.34 / height,
             f"Likeliest failure paths (numbered as in the briefing), every route flown with noise {noise:g}; "
             f"{style.FIGURE_NOTICE}.\nBars: P(incident) by the leg on which the vehicle was last on the nominal "
             "route; they sum to the route's P(incident).", fontsize=style.FONT_SIZE - 2, ha="left", va="top",
             color=style.MUTED)
    handles = [Line2D([], [], color=style.FAILURE_PATH, lw=0.7, ls=(0, (2, 1)), label="failure path"),
               Line2D([], [], ls="none", marker="o", mfc="none", mec=style.FAILURE_PATH, ms=3,
                      label="move where noise or drift acted")]
    handles += plots.route_handles({n: routes[n] for n in names})
    fig.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.45 / width, 0.0), ncol=3,
               fontsize=style.FONT_SIZE - 2, frameon=False)
    return fig


@plots.styled
def plot_causes(site, grid, routes: dict, causes: dict, path) -> Path:
    """The failure-path figure (see :func:`figure_causes`) saved to ``path``."""
    return plots.save(figure_causes(site, grid, routes, causes), path)


__all__ = ["figure_causes", "figure_tradeoff", "plot_causes", "plot_tradeoff"]
