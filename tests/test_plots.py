"""Figures a reviewer reads: checked on the drawn artists, not on pixels.

Labels must not collide, drift arrows must be drawn above the routes, run-ending
hazards must be hatched, the legend must hold only what a reviewer can act on, and the
map's colours must stay apart under simulated colour-vision deficiency.
"""

from __future__ import annotations

import itertools
import math

import matplotlib

matplotlib.use("Agg")

import colour  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pytest  # noqa: E402
from colorspacious import cspace_convert, machado_et_al_2009_matrix  # noqa: E402
from conftest import feature, rect, small_site_dict  # noqa: E402
from matplotlib.colors import to_rgb  # noqa: E402
from matplotlib.patches import FancyArrowPatch, PathPatch  # noqa: E402
from numpy.testing import assert_allclose  # noqa: E402

from planner import plots, plots_risk, style  # noqa: E402
from planner.grid import GridSpec, descend, rasterise  # noqa: E402
from planner.model import Dynamics, build_model  # noqa: E402
from planner.risk import RiskRow, risk_map  # noqa: E402
from planner.route import build_route, nominal_path  # noqa: E402
from planner.site import site_from_geojson  # noqa: E402

#: The simulations every map colour is checked under (colorspacious names), severity 100.
DEFICIENCIES = ("deuteranomaly", "protanomaly", "tritanomaly")


@pytest.fixture(scope="module")
def crowded():
    """The small test site with two long-named zones side by side, as on a real yard where
    a drop edge runs along a side slope: their labels cannot both sit at their centres."""
    data = small_site_dict()
    data["features"] += [
        feature("hazard", "Polygon", rect(20, 44, 80, 47), name="Loading-dock drop edge"),
        feature("rough", "Polygon", rect(20, 47, 80, 52), name="Embankment side-slope", cost_factor=1.5),
    ]
    site = site_from_geojson(data)
    grid = rasterise(site, GridSpec(2.0))
    # drift off in the model, so the nominal route is the plain cheapest path (the arrows
    # are drawn from the grid's drift zones all the same)
    model = build_model(grid, Dynamics(drift_scale=0.0))
    path = nominal_path(model, descend(grid))
    routes = {name: build_route(name, path, grid, site, model) for name in ("cautious", "shortest")}
    return site, grid, model, routes


@pytest.fixture(scope="module")
def routes_figure(crowded):
    site, grid, _, routes = crowded
    fig = plots.figure_routes(site, grid, routes)
    fig.canvas.draw()
    yield fig
    plt.close(fig)


def _map_axes(fig):
    return fig.axes[0]


def _labels(ax):
    return [t for t in ax.texts if t.get_gid() == plots.LABEL_GID]


def _overlap(a, b) -> bool:
    return a.x0 < b.x1 and b.x0 < a.x1 and a.y0 < b.y1 and b.y0 < a.y1


# ----------------------------------------------------------------------------- labels


def test_zone_labels_do_not_overlap_each_other_markers_or_routes(crowded, routes_figure):
    site = crowded[0]
    ax = _map_axes(routes_figure)
    renderer = routes_figure.canvas.get_renderer()
    labels = _labels(ax)
    boxes = [plots.label_box(t, renderer) for t in labels]
    for (i, a), (j, b) in itertools.combinations(enumerate(boxes), 2):
        assert not _overlap(a, b), (labels[i].get_text(), labels[j].get_text())
    markers = [line.get_window_extent(renderer) for line in ax.lines if line.get_gid() in ("start", "goal")]
    assert len(markers) == 2
    markers += [p.get_window_extent(renderer) for p in ax.patches if p.get_gid() == plots.DRIFT_GID]
    furniture = [t.get_window_extent(renderer) for t in ax.texts if t.get_gid() == plots.FURNITURE_GID]
    assert furniture
    axes_box = ax.get_window_extent(renderer)
    for box in boxes:
        assert not any(_overlap(box, m) for m in markers + furniture)
        assert axes_box.x0 <= box.x0 and box.x1 <= axes_box.x1 and axes_box.y0 <= box.y0 and box.y1 <= axes_box.y1
    # no label box covers a vertex of a route line (they stay readable)
    for line in ax.lines:
        if line.get_gid() == plots.ROUTE_GID:
            xy = ax.transData.transform(np.column_stack(line.get_data()))
            for box in boxes:
                assert not np.any((xy[:, 0] > box.x0) & (xy[:, 0] < box.x1) & (xy[:, 1] > box.y0)
                                  & (xy[:, 1] < box.y1))
    # every zone is either labelled or named in the note under the legend
    shown = {t.get_text() for t in labels}
    note = " ".join(t.get_text() for t in ax.texts if t.get_text().startswith("labels left out"))
    for zone in site.zones:
        assert zone.name in shown or zone.name in note, zone.name


def test_a_label_that_fits_nowhere_is_left_out_and_named():
    fig, ax = plt.subplots(figsize=(2, 2), dpi=100)
    ax.set_xlim(0, 10)
    ax.set_ylim(0, 10)
    from shapely.geometry import box

    # a 2-inch map (about 1.5 inch of axes): a short name fits, a name longer than the
    # axes is wide fits nowhere, not even at the end of a leader line
    long_name = "A zone name far too long for this little map to hold anywhere"
    left_out = plots.place_labels(ax, [("Pit", box(4, 4, 6, 6)), (long_name, box(4.9, 4.9, 5.1, 5.1))])
    fig.canvas.draw()
    assert left_out == [long_name]
    assert [t.get_text() for t in _labels(ax)] == ["Pit"]
    plt.close(fig)


# ----------------------------------------------------------------------------- drift, hazards, legend


def test_drift_arrows_are_visible_patches_above_the_routes(routes_figure):
    ax = _map_axes(routes_figure)
    arrows = [p for p in ax.patches if p.get_gid() == plots.DRIFT_GID]
    routes = [line for line in ax.lines if line.get_gid() == plots.ROUTE_GID]
    assert arrows and len(routes) == 2
    assert all(isinstance(a, FancyArrowPatch) for a in arrows)
    assert min(a.get_zorder() for a in arrows) > max(line.get_zorder() for line in routes)
    # at least 4 mm long on the page: 4 / 25.4 inch at the figure's resolution
    renderer = routes_figure.canvas.get_renderer()
    smallest = min(max(a.get_window_extent(renderer).width, a.get_window_extent(renderer).height) for a in arrows)
    assert smallest >= 4 / 25.4 * routes_figure.dpi
    # the gust lane pushes toward 180 deg (south): every arrow points down the page
    for a in arrows:
        (x0, y0), (x1, y1) = a._posA_posB
        assert y1 < y0 and math.isclose(x0, x1)


def test_run_ending_hazards_are_hatched_over_exactly_their_cells(crowded, routes_figure):
    _, grid, _, _ = crowded
    ax = _map_axes(routes_figure)
    hatched = [p for p in ax.patches if isinstance(p, PathPatch) and p.get_hatch()]
    assert hatched
    from shapely.geometry import Polygon
    from shapely.ops import unary_union

    area = unary_union([Polygon(poly) for p in hatched for poly in p.get_path().to_polygons()]).area
    # counted directly: cells labelled with a hazard whose ends_run is set
    ending = [k for k, h in enumerate(grid.hazards) if h.ends_run]
    n_cells = int(np.isin(grid.label, ending).sum())
    assert n_cells > 0
    assert_allclose(area, n_cells * grid.cell_m**2, rtol=1e-9)


def test_legend_holds_only_what_a_reviewer_can_act_on(routes_figure):
    ax = _map_axes(routes_figure)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert not any("differently" in t for t in labels)
    allowed = ("cautious (SARSA)", "shortest (Q-learning)", "hazard (ends the run)", "hazard (penalty, run goes on)",
               "hazard buffer", "rough (costs more)", "drift (mean push)", "outside boundary", "start", "goal")
    assert all(t.startswith(allowed) for t in labels), labels
    assert len(labels) <= 12


def test_the_map_fills_its_canvas_and_the_legend_sits_below_it(routes_figure):
    ax = _map_axes(routes_figure)
    renderer = routes_figure.canvas.get_renderer()
    page = routes_figure.get_tightbbox(renderer)  # in inches: what bbox_inches="tight" saves
    map_box = ax.get_window_extent(renderer)
    share = (map_box.width * map_box.height) / (page.width * page.height * routes_figure.dpi**2)
    assert share > 0.55, share
    assert ax.get_legend().get_window_extent(renderer).y1 <= map_box.y0


# ----------------------------------------------------------------------------- colours


def _delta_e_matrix(colors, deficiency=None):
    rgb = np.array([to_rgb(c) for c in colors])
    if deficiency is not None:
        rgb = np.clip(cspace_convert(rgb, {"name": "sRGB1+CVD", "cvd_type": deficiency, "severity": 100}, "sRGB1"),
                      0, 1)
    lab = cspace_convert(rgb, "sRGB1", "CIELab")
    return lab


def test_the_colour_difference_and_simulation_are_the_published_ones():
    # Sharma, Wu and Dalal (2005), "The CIEDE2000 color-difference formula: implementation
    # notes, supplementary test data, and mathematical observations", Color Research and
    # Application 30(1), Table 1, pair 1: 2.0425
    assert_allclose(colour.delta_E([50.0, 2.6772, -79.7751], [50.0, 0.0, -82.7485], method="CIE 2000"), 2.0425,
                    atol=5e-5)
    # Machado, Oliveira and Fernandes (2009), "A physiologically-based model for simulation
    # of color vision deficiency", IEEE TVCG 15(6), table of matrices, deuteranomaly at
    # severity 1.0, first row
    assert_allclose(machado_et_al_2009_matrix("deuteranomaly", 100)[0], [0.367322, 0.860646, -0.227968])


@pytest.mark.parametrize("deficiency", (None, *DEFICIENCIES))
def test_map_classes_stay_apart_under_simulated_colour_vision_deficiency(deficiency):
    names = list(style.MAP_CLASSES)
    lab = _delta_e_matrix(style.MAP_CLASSES.values(), deficiency)
    worst = min((float(colour.delta_E(lab[i], lab[j], method="CIE 2000")), names[i], names[j])
                for i, j in itertools.combinations(range(len(names)), 2))
    assert worst[0] >= style.MAP_MIN_DELTA_E, worst


def test_the_map_draws_only_checked_colours(routes_figure):
    """Every fill colour of the cell image is one of the checked classes (so the check covers the map)."""
    ax = _map_axes(routes_figure)
    image = ax.get_images()[0]
    drawn = {tuple(np.round(c[:3], 4)) for c in image.cmap(np.linspace(0, 1, image.cmap.N))}
    checked = {tuple(np.round(to_rgb(c), 4)) for c in style.MAP_CLASSES.values()}
    assert drawn <= checked


# ----------------------------------------------------------------------------- risk map


@pytest.fixture(scope="module")
def risk_figure(crowded):
    from planner.model import epsilon_greedy

    site, grid, model, routes = crowded
    probs = epsilon_greedy(descend(grid), model.n_actions, 0.1)
    maps = {name: risk_map(model, probs) for name in routes}
    fig = plots_risk.figure_risk_maps(site, grid, maps, routes, noise=0.1)
    fig.canvas.draw()
    yield fig, maps
    plt.close(fig)


def test_risk_map_says_what_it_shows_and_keeps_hazards_off_the_scale(risk_figure):
    fig, _ = risk_figure
    text = " ".join(t.get_text() for t in fig.texts)
    assert "if the vehicle were here" in text
    norm, cmap = plots_risk.risk_colour_scale()
    scale = [cmap(x)[:3] for x in np.linspace(0, 1, 64)]
    for deficiency in (None, *DEFICIENCIES):
        lab = _delta_e_matrix([style.RISK_HAZARD, style.RISK_BELOW_FLOOR, *scale], deficiency)
        for k, what in ((0, "hazard"), (1, "below the floor")):
            nearest = min(float(colour.delta_E(lab[k], lab[2 + j], method="CIE 2000")) for j in range(len(scale)))
            assert nearest >= style.MAP_MIN_DELTA_E, (what, deficiency, nearest)
    hatched = [p for ax in fig.axes[:2] for p in ax.patches if isinstance(p, PathPatch) and p.get_hatch()]
    assert hatched and all(p.get_facecolor()[:3] == to_rgb(style.RISK_HAZARD) for p in hatched)
    ticks = [t.get_text() for t in fig.axes[-1].get_yticklabels()]
    assert "1 in 1,000" in ticks and "certain" in ticks


def test_risk_map_draws_values_below_its_floor_in_their_own_colour(risk_figure):
    fig, maps = risk_figure
    values = next(iter(maps.values()))
    floor = plots_risk.risk_colour_scale()[0].vmin
    ax = fig.axes[0]
    shown = ax.get_images()[1].get_array()
    below = np.isfinite(values) & (values < floor)
    assert below.any()
    # cells below the floor are not on the colour scale (masked), the others are
    assert np.all(np.ma.getmaskarray(shown).ravel()[below])
    above = np.isfinite(values) & (values >= floor)
    assert not np.any(np.ma.getmaskarray(shown).ravel()[above])


# ----------------------------------------------------------------------------- sensitivity


def _rows():
    rows = []
    for policy, base in (("cautious", 1e-4), ("shortest", 1e-2), ("exact on-policy", 0.0), ("exact optimal", 3e-3)):
        for m in (1.0, 1.5, 2.0):
            for eps in (0.0, 0.05, 0.1, 0.2):
                # the exact on-policy row at zero noise is far below the floor (1e-15)
                p = 1e-15 if base == 0.0 and eps == 0.0 else min(0.9, (base or 1e-5) * m * (1 + 40 * eps))
                rows.append(RiskRow(policy=policy, noise=eps, drift_scale=m, p_goal=1 - p, p_incident=p,
                                    p_by_event={"boundary": p}, p_never=0.0, expected_moves=10.0,
                                    expected_m=50.0, residual=0.0))
    return rows


def test_sensitivity_has_few_series_direct_labels_and_its_own_panel_for_exact_references():
    fig = plots_risk.figure_sensitivity(_rows())
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    learned, exact = fig.axes[:2]
    assert learned.get_title(loc="left") == "learned policies" and exact.get_title(loc="left") == "exact references"
    for ax, names in ((learned, ("cautious", "shortest")), (exact, ("exact on-policy", "exact optimal"))):
        labels = [t.get_text() for t in _labels(ax)]
        # two policies x two drift scales (the planning one and the strongest), each labelled
        assert sorted(labels) == sorted(f"{n}, drift x{m:g}" for n in names for m in (1, 2))
        boxes = [t.get_window_extent(renderer) for t in _labels(ax)]
        assert not any(_overlap(a, b) for a, b in itertools.combinations(boxes, 2))
        assert ax.get_legend() is None
    # the value below 1 in 10^12 sits on the floor line, with an open marker, under every tick
    floor_y = min(line.get_ydata()[0] for line in exact.lines if line.get_linestyle() == "--" or
                  len(set(line.get_ydata())) == 1)
    open_markers = [line for line in exact.lines if line.get_marker() == "o" and line.get_markerfacecolor() == "white"
                    and len(line.get_xdata())]
    assert open_markers and all(np.all(line.get_ydata() == floor_y) for line in open_markers)
    ticks = exact.get_yticks()
    assert floor_y == min(ticks) and floor_y < 1e-6
    assert learned.get_yticklabels()[0].get_text() == "< 1 in 10^12"
    plt.close(fig)
