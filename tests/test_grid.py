"""Rasterising: cell labels, buffers, cost factors, drift classes, shortest paths."""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from conftest import feature, point, rect
from numpy.testing import assert_allclose, assert_array_equal
from shapely.geometry import Point, Polygon, box
from shapely.ops import unary_union

from planner.errors import BudgetError, SettingsError, SiteError, SiteWarning
from planner.grid import (
    FREE,
    OUTSIDE,
    GridSpec,
    HazardInfo,
    cost_to_goal,
    grid_from_arrays,
    rasterise,
)
from planner.site import Frame, Site, Zone, load_site, site_from_geojson

MAPS = Path(__file__).resolve().parent.parent / "maps"
#: The cell sizes maps/README.md recommends for the demo sites.
RECOMMENDED_CELL_M = {"ground-yard": 5.0, "drone-range": 5.0}

CELL = 5.0
START = (12.5, 32.5)
GOAL = (87.5, 32.5)


# ----------------------------------------------------------------------------- helpers


def zone(index, name, role, geometry, **props):
    """A zone drawn directly in metres (buffered as the loader does)."""
    buffer_m = props.get("buffer_m", 0.0)
    buffered = geometry.buffer(buffer_m) if buffer_m > 0 else geometry
    return Zone(feature=index, name=name, role=role, geometry=geometry, buffered=buffered, **props)


def metric_site(*zones, boundary=None, start=START, goal=GOAL):
    """A site in exact metres (no projection), so cell edges fall where we say.

    The default boundary is 100 m x 60 m with its south-west corner at the origin:
    at 5 m cells, column ``c`` spans x in [5c, 5c + 5] and row ``r`` y in [5r, 5r + 5].
    """
    boundary = box(0.0, 0.0, 100.0, 60.0) if boundary is None else boundary
    goal_geometry = goal if hasattr(goal, "geom_type") else Point(goal)
    return Site(
        name="Metric yard", source="metric.geojson", sha256="0" * 64,
        frame=Frame(crs="+proj=tmerc +lat_0=0 +lon_0=0 +ellps=WGS84 +units=m +type=crs", kind="local-tmerc",
                    lon_0=0.0, lat_0=0.0),
        boundary=boundary, start=Point(start), goal=goal_geometry, start_name="Launch", goal_name="Target",
        zones=tuple(zones), scale_distortion=0.0,
    )


def interval_overlap(lo, hi, cell_lo, cell_hi):
    return np.clip(np.minimum(hi, cell_hi) - np.maximum(lo, cell_lo), 0.0, None)


def box_fraction(bounds, shape, cell=CELL):
    """Fraction of each cell an axis-aligned box covers: a product of two 1-D overlaps."""
    x0, y0, x1, y1 = bounds
    rows, cols = np.indices(shape)
    fx = interval_overlap(x0, x1, cols * cell, (cols + 1) * cell) / cell
    fy = interval_overlap(y0, y1, rows * cell, (rows + 1) * cell) / cell
    return fx * fy


def centres_in_box(bounds, shape, cell=CELL):
    x0, y0, x1, y1 = bounds
    rows, cols = np.indices(shape)
    cx, cy = (cols + 0.5) * cell, (rows + 0.5) * cell
    return (cx >= x0) & (cx <= x1) & (cy >= y0) & (cy <= y1)


def box_distance(bounds, shape, cell=CELL):
    """Euclidean distance from each cell (as a closed square) to an axis-aligned box."""
    x0, y0, x1, y1 = bounds
    rows, cols = np.indices(shape)
    gap_x = np.maximum.reduce([x0 - (cols + 1) * cell, cols * cell - x1, np.zeros(shape)])
    gap_y = np.maximum.reduce([y0 - (rows + 1) * cell, rows * cell - y1, np.zeros(shape)])
    return np.hypot(gap_x, gap_y)


# ----------------------------------------------------------------------------- labels


@pytest.mark.parametrize("threshold", [0.0, 0.005, 0.01, 0.3, 0.5, 0.9])
def test_hazard_labels_follow_the_overlap_threshold(threshold):
    # The pond covers 0.1 m of columns 9 and 12 and 2.4 m of rows 4 and 7.
    pond = (49.9, 22.6, 60.1, 37.4)
    site = metric_site(zone(3, "Pond", "hazard", box(*pond)))
    grid = rasterise(site, GridSpec(CELL, hazard_overlap=threshold))
    fraction = box_fraction(pond, grid.shape)
    # Conservative by default: any overlap with positive area makes the cell hazard.
    assert_array_equal(grid.label == 0, fraction > threshold)
    if threshold == 0.0:
        assert (grid.label == 0).sum() == 16


def test_hazard_touching_only_along_a_cell_edge_does_not_spread():
    # Edges exactly on cell edges: the neighbours share a line, not an area.
    site = metric_site(zone(3, "Pond", "hazard", box(50.0, 20.0, 60.0, 40.0)))
    grid = rasterise(site, GridSpec(CELL))
    expected = np.zeros(grid.shape, dtype=bool)
    expected[4:8, 10:12] = True
    assert_array_equal(grid.label == 0, expected)


@pytest.mark.parametrize("cover", [1.0, 0.6, 0.5, 0.2, 0.1])
def test_boundary_labels_follow_the_cover_threshold(cover):
    # A 98 m x 61 m yard: the last column is 60% inside, the top row 20%, their corner 12%.
    bounds = (0.0, 0.0, 98.0, 61.0)
    site = metric_site(boundary=box(*bounds))
    grid = rasterise(site, GridSpec(CELL, boundary_cover=cover))
    assert grid.shape == (13, 20)
    fraction = box_fraction(bounds, grid.shape)
    # "At least" the fraction: a cell exactly 60% inside is inside at cover 0.6.
    assert_array_equal(grid.label != OUTSIDE, fraction >= cover - 1e-12)


def test_boundary_must_cover_a_cell_wholly_by_default():
    # A right triangle with legs 100 m (east) and 60 m (north): a cell is wholly
    # inside exactly when its north-east corner is, i.e. 60 x + 100 y <= 6000.
    site = metric_site(boundary=Polygon([(0, 0), (100, 0), (0, 60)]), start=(12.5, 12.5), goal=(52.5, 7.5))
    grid = rasterise(site, GridSpec(CELL))
    rows, cols = np.indices(grid.shape)
    wholly = 60.0 * (cols + 1) * CELL + 100.0 * (rows + 1) * CELL <= 6000.0
    assert_array_equal(grid.label != OUTSIDE, wholly)
    assert wholly.sum() < (grid.label.size // 2)


def test_buffers_enlarge_hazard_cells_with_round_corners():
    # A 15.2 m square pond with a 3 m buffer. Cells beside an edge lie 2.4 m away
    # (inside the buffer); the diagonal cells lie hypot(2.4, 2.4) = 3.39 m away, so a
    # round buffer leaves them free where a square one would not.
    pond = (42.4, 22.4, 57.6, 37.6)
    plain = rasterise(metric_site(zone(3, "Pond", "hazard", box(*pond))), GridSpec(CELL))
    buffered = rasterise(metric_site(zone(3, "Pond", "hazard", box(*pond), buffer_m=3.0)), GridSpec(CELL))
    distance = box_distance(pond, plain.shape)
    assert not np.any(np.abs(distance - 3.0) < 0.05)  # no cell sits on the buffer's edge
    assert_array_equal(plain.label == 0, box_fraction(pond, plain.shape) > 0)
    assert_array_equal(buffered.label == 0, distance < 3.0)
    assert (buffered.label == 0).sum() == 6 * 6 - 4
    assert np.all(buffered.label[plain.label == 0] == 0)


def test_loader_buffer_enlarges_hazard_cells(site_dict):
    site_dict["features"][3]["properties"]["buffer_m"] = 0.0
    plain = rasterise(site_from_geojson(site_dict), GridSpec(2.0))
    site_dict["features"][3]["properties"]["buffer_m"] = 4.0
    buffered = rasterise(site_from_geojson(site_dict), GridSpec(2.0))
    inner, outer = plain.label == 0, buffered.label == 0
    assert np.all(outer[inner]) and outer.sum() > inner.sum()
    # 20 m square + 4 m all round spans 28 m: 14 cells of 2 m, give or take the
    # cell each side the outline straddles.
    rows, cols = np.nonzero(outer)
    assert 14 <= cols.max() - cols.min() + 1 <= 16
    assert 14 <= rows.max() - rows.min() + 1 <= 16


def test_ending_hazard_wins_where_hazards_overlap():
    puddle = zone(3, "Puddle", "hazard", box(30.5, 20.5, 49.5, 39.5), ends_run=False, penalty_m=10.0)
    pit = zone(4, "Pit", "hazard", box(40.5, 20.5, 59.5, 39.5))
    grid = rasterise(metric_site(puddle, pit), GridSpec(CELL))
    assert_array_equal(grid.label[4:8, 6:8], 0)
    assert_array_equal(grid.label[4:8, 8:12], 1)
    assert grid.hazards[0].ends_run is False and grid.hazards[1].ends_run is True
    assert not grid.passable()[5, 9] and grid.passable()[5, 6]


def test_rough_cells_take_the_largest_cost_factor_by_cell_centre():
    a, b = (20.0, 0.0, 41.0, 16.0), (31.0, 0.0, 51.0, 11.0)
    # The dearer zone comes first, so "last one wins" would fail where they overlap.
    site = metric_site(zone(3, "Rubble", "rough", box(*b), cost_factor=3.0),
                       zone(4, "Gravel", "rough", box(*a), cost_factor=2.0))
    grid = rasterise(site, GridSpec(CELL))
    expected = np.ones(grid.shape)
    expected[centres_in_box(a, grid.shape)] = 2.0
    expected[centres_in_box(b, grid.shape)] = 3.0
    assert_array_equal(grid.cost_factor, expected)
    assert (grid.cost_factor == 3.0).sum() == 8 and (grid.cost_factor == 2.0).sum() == 12 - 4


def test_goal_area_marks_the_cells_whose_centres_it_covers():
    grid = rasterise(metric_site(goal=box(80.5, 25.5, 94.5, 39.5)), GridSpec(CELL))
    expected = np.zeros(grid.shape, dtype=bool)
    expected[5:8, 16:19] = True
    assert_array_equal(grid.goal, expected)


def test_row_zero_is_south_and_column_zero_is_west():
    site = metric_site(zone(3, "South-west pit", "hazard", box(0.5, 0.5, 4.5, 4.5)))
    grid = rasterise(site, GridSpec(CELL))
    assert grid.label[0, 0] == 0 and grid.start == (6, 2)
    east, north = grid.centres()
    assert_allclose((east[0, 0], north[0, 0]), (2.5, 2.5))
    rows, cols = np.indices(grid.shape)
    looked_up = np.array([grid.cell_of(x, y) for x, y in zip(east.ravel(), north.ravel(), strict=True)])
    assert_array_equal(looked_up, np.column_stack([rows.ravel(), cols.ravel()]))


# ----------------------------------------------------------------------------- refusals


def test_grid_over_the_cell_budget_is_refused_with_the_estimate():
    site = metric_site()
    # 100 m x 60 m at 0.1 m is 1000 x 600 cells; the estimate is 8 actions x (9
    # outcomes x 30 bytes + 8) bytes per cell = 1.33e9 bytes, 1.2 GiB.
    with pytest.raises(BudgetError, match=r"GridSpec\.cell_m 0.1 m gives 600,000 cells, over the GridSpec.max_cells budget of "
                                          r"400,000 \(about 1.2 GiB of model\); use a larger GridSpec\.cell_m") as info:
        rasterise(site, GridSpec(0.1))
    assert isinstance(info.value, MemoryError)
    with pytest.raises(BudgetError, match=r"GridSpec\.cell_m 0.5 m gives 24,000 cells, over the GridSpec.max_cells budget of 23,999"):
        rasterise(site, GridSpec(0.5, max_cells=23_999))
    assert rasterise(site, GridSpec(0.5, max_cells=24_000)).n_cells == 24_000


def test_cell_larger_than_the_site_is_refused():
    site = metric_site()
    with pytest.raises(SettingsError, match=r"GridSpec\.cell_m 150 m is larger than the site \(100 m x 60 m\)"):
        rasterise(site, GridSpec(150.0))


@pytest.mark.parametrize(("kwargs", "message"), [
    ({"cell_m": 0.0}, r"GridSpec\.cell_m must be a positive number of metres, got 0.0"),
    ({"cell_m": -5.0}, r"GridSpec\.cell_m must be a positive number of metres, got -5.0"),
    ({"cell_m": float("nan")}, r"GridSpec\.cell_m must be a positive number of metres, got nan"),
    ({"cell_m": float("inf")}, r"GridSpec\.cell_m must be a positive number of metres, got inf"),
    ({"cell_m": "5"}, r"GridSpec\.cell_m must be a positive number of metres, got '5'"),
    ({"cell_m": 5.0, "hazard_overlap": 1.0}, r"GridSpec\.hazard_overlap must be a number in \[0, 1\), got 1.0"),
    ({"cell_m": 5.0, "hazard_overlap": -0.1}, r"GridSpec\.hazard_overlap must be a number in \[0, 1\), got -0.1"),
    ({"cell_m": 5.0, "boundary_cover": 0.0}, r"GridSpec\.boundary_cover must be a number in \(0, 1\], got 0.0"),
    ({"cell_m": 5.0, "boundary_cover": 1.5}, r"GridSpec\.boundary_cover must be a number in \(0, 1\], got 1.5"),
    ({"cell_m": 5.0, "max_cells": 0}, r"GridSpec\.max_cells must be a positive whole number, got 0"),
    ({"cell_m": 5.0, "max_cells": 1e6}, r"GridSpec\.max_cells must be a positive whole number, got 1000000.0"),
])
def test_grid_spec_refuses_bad_settings(kwargs, message):
    with pytest.raises(SettingsError, match=message):
        GridSpec(**kwargs)


def test_goal_behind_a_hazard_wall_is_refused(site_dict):
    site_dict["features"].append(feature("hazard", "Polygon", rect(70, -1, 73, 61), name="Perimeter wall"))
    site = site_from_geojson(site_dict)
    with pytest.raises(SiteError, match=r"no sequence of moves reaches goal 'Target' from start 'Launch' at "
                                        r"GridSpec\.cell_m 5 m \(hazards or the boundary close every way\)"):
        rasterise(site, GridSpec(CELL))


def test_goal_behind_a_diagonal_seam_is_refused():
    # Hazard cells meeting only at corners still block: corner-cutting counts.
    # Cells (row 11 - k, column k) for k = 0..11 run from the north-west corner to the
    # south edge, with the start south-west of them and the goal north-east.
    cells = [box(5 * k + 0.5, 5 * (11 - k) + 0.5, 5 * k + 4.5, 5 * (11 - k) + 4.5) for k in range(12)]
    seam = zone(3, "Trench seam", "hazard", unary_union(cells[2:10]))
    boundary = Polygon([(0, 0), (100, 0), (100, 60), (0, 60)])
    site = metric_site(seam, boundary=boundary, start=(2.5, 2.5), goal=(97.5, 57.5))
    grid = rasterise(site, GridSpec(CELL))
    assert np.isfinite(cost_to_goal(grid)[grid.start_index])  # the seam leaves both ends open
    closed = metric_site(zone(3, "Trench seam", "hazard", unary_union(cells)), boundary=boundary,
                         start=(2.5, 2.5), goal=(97.5, 57.5))
    with pytest.raises(SiteError, match="no sequence of moves reaches goal 'Target'"):
        rasterise(closed, GridSpec(CELL))


def test_start_in_a_cell_touched_by_a_buffer_is_refused_at_coarse_cells(site_dict):
    # The pond's 2 m buffer reaches 38 m east; a start at 37 m is legal, but the 5 m
    # cell holding it is touched by the buffer. At 1 m cells it is free.
    site_dict["features"][1]["geometry"]["coordinates"] = point(37, 30)
    site = site_from_geojson(site_dict)
    with pytest.raises(SiteError, match=r"start 'Launch' falls in a cell touched by hazard feature 3 \('Pond'\) "
                                        r"at GridSpec\.cell_m 5 m; use a smaller GridSpec\.cell_m or move the start"):
        rasterise(site, GridSpec(CELL))
    grid = rasterise(site, GridSpec(1.0))
    assert grid.label[grid.start] == FREE


# ----------------------------------------------------------------------------- arrays


def _open(shape=(3, 4)):
    goal = np.zeros(shape, dtype=bool)
    goal[-1, -1] = True
    return np.full(shape, FREE), goal


@pytest.mark.parametrize(("change", "message"), [
    (lambda kw: kw.update(label=np.full(5, FREE)), r"label must be 2-D, got shape \(5,\)"),
    (lambda kw: kw.update(goal=np.zeros((2, 2), dtype=bool)), r"goal shape \(2, 2\) differs from label shape"),
    (lambda kw: kw["label"].__setitem__((1, 1), 0), r"label uses hazard 0 but only 0 hazards are given"),
    (lambda kw: kw.update(drift_class=np.ones((3, 4), dtype=int)),
     r"drift_class refers to a class with no entry in drift_members"),
    (lambda kw: kw.update(goal=np.zeros((3, 4), dtype=bool)), r"grid has no goal cell"),
    (lambda kw: kw["label"].__setitem__((0, 0), OUTSIDE), r"start \(0, 0\) is outside or on the goal"),
    (lambda kw: kw.update(start=(2, 3)), r"start \(2, 3\) is outside or on the goal"),
])
def test_grid_from_arrays_validates(change, message):
    label, goal = _open()
    kwargs = {"label": label, "goal": goal, "start": (0, 0)}
    change(kwargs)
    with pytest.raises(SettingsError, match=message):
        grid_from_arrays(**kwargs)


def test_grid_from_arrays_keeps_what_it_is_given():
    label, goal = _open()
    label[1, 1] = 0
    grid = grid_from_arrays(label, goal=goal, start=(0, 0), cell_m=2.0, hazards=(HazardInfo("Pit"),),
                            x0=100.0, y0=200.0)
    assert grid.shape == (3, 4) and grid.n_cells == 12 and grid.start_index == 0
    assert grid.label.dtype == np.int16 and grid.label[1, 1] == 0
    assert_array_equal(grid.cost_factor, 1.0)
    assert_array_equal(grid.drift_class, 0)
    assert grid.cell_of(100.0 + 2.0 * 3.5, 200.0 + 2.0 * 1.5) == (1, 3)


# ----------------------------------------------------------------------------- shortest paths


def test_cost_to_goal_on_an_open_grid_is_the_octile_distance():
    # Closed form for king moves with diagonal cost sqrt(2) and no obstacles:
    # (max(dx, dy) - min(dx, dy)) + sqrt(2) min(dx, dy), times the cell side.
    shape, goal_cell, cell = (9, 13), (4, 6), 2.5
    label = np.full(shape, FREE)
    goal = np.zeros(shape, dtype=bool)
    goal[goal_cell] = True
    grid = grid_from_arrays(label, goal=goal, start=(0, 0), cell_m=cell)
    rows, cols = np.indices(shape)
    dy, dx = np.abs(rows - goal_cell[0]), np.abs(cols - goal_cell[1])
    lo, hi = np.minimum(dx, dy), np.maximum(dx, dy)
    assert_allclose(cost_to_goal(grid, 8).reshape(shape), ((hi - lo) + math.sqrt(2.0) * lo) * cell, rtol=1e-12)
    # Four moves: the Manhattan distance; one cell side per move: the king's move count.
    assert_allclose(cost_to_goal(grid, 4).reshape(shape), (dx + dy) * cell, rtol=1e-12)
    assert_allclose(cost_to_goal(grid, 8, unit_cost=True).reshape(shape), hi * cell, rtol=1e-12)


def test_cost_to_goal_scales_with_a_uniform_cost_factor():
    label, goal = _open((5, 6))
    plain = grid_from_arrays(label, goal=goal, start=(0, 0))
    rough = grid_from_arrays(label, goal=goal, start=(0, 0), cost_factor=np.full((5, 6), 1.5))
    assert_allclose(cost_to_goal(rough), 1.5 * cost_to_goal(plain), rtol=1e-12)


def test_cost_to_goal_does_not_cut_corners_past_a_hazard():
    label = np.array([[FREE, 0], [FREE, FREE]])  # row 0 south: hazard at the south-east
    goal = np.array([[False, False], [False, True]])
    grid = grid_from_arrays(label, goal=goal, start=(0, 0), cell_m=1.0, hazards=(HazardInfo("Pit"),))
    # The diagonal from (0, 0) to (1, 1) passes the pit's corner: go north, then east.
    assert_allclose(cost_to_goal(grid)[0], 2.0)


def test_cost_to_goal_adds_the_penalty_of_a_non_ending_hazard():
    label = np.array([[FREE, FREE, 0, FREE, FREE]])
    goal = np.array([[True, False, False, False, False]])
    grid = grid_from_arrays(label, goal=goal, start=(0, 4), cell_m=2.0,
                            hazards=(HazardInfo("Cattle grid", ends_run=False, penalty_m=7.0),))
    assert_allclose(cost_to_goal(grid, 4, hazard_penalty_m=[7.0]), [0.0, 2.0, 4.0, 13.0, 15.0])
    assert_allclose(cost_to_goal(grid, 4), [0.0, 2.0, 4.0, 6.0, 8.0])


# ----------------------------------------------------------------------------- demo sites


@pytest.mark.parametrize("name", sorted(RECOMMENDED_CELL_M))
def test_demo_sites_rasterise_at_the_recommended_cell(name):
    with warnings.catch_warnings():
        warnings.simplefilter("error", SiteWarning)
        site = load_site(MAPS / f"{name}.geojson")
    grid = rasterise(site, GridSpec(RECOMMENDED_CELL_M[name]))
    assert 2_000 <= grid.n_cells <= 10_000
    assert grid.warnings == ()
    assert grid.label[grid.start] == FREE and grid.goal.any()
    assert set(np.unique(grid.label[grid.label >= 0]).tolist()) == set(range(len(site.hazards)))
    assert np.isfinite(cost_to_goal(grid)[grid.start_index])
    assert len(grid.drift_members) >= 2


def test_ground_yard_layout_survives_rasterising():
    site = load_site(MAPS / "ground-yard.geojson")
    grid = rasterise(site, GridSpec(RECOMMENDED_CELL_M["ground-yard"]))
    names = [h.name for h in grid.hazards]
    drop, pond = names.index("Loading-dock drop edge"), names.index("Settling pond")
    drop_rows = np.unique(np.nonzero(grid.label == drop)[0])
    pond_rows = np.unique(np.nonzero(grid.label == pond)[0])
    # Row 0 is south: the drop edge is one row of cells, the pond north of it, with a
    # four-row lane between them on the slope, where the straight line runs.
    assert drop_rows.size == 1 and pond_rows.min() - drop_rows.max() - 1 == 4
    assert drop_rows.max() < grid.start[0] < pond_rows.min()
    slope_cells = grid.drift_class > 0
    assert np.all(slope_cells[drop_rows.max() + 1:pond_rows.min(), 22:62])
    gravel = grid.cost_factor > 1
    assert gravel.any() and np.nonzero(gravel)[0].max() < drop_rows.min()


# ----------------------------------------------------------------------------- drawing tolerance on large sites


def _large_site(ring_lonlat):
    """A site of one drawn boundary ring (lon/lat), start and goal near its centre."""
    xs = [p[0] for p in ring_lonlat]
    ys = [p[1] for p in ring_lonlat]
    lon, lat = sum(xs[:-1]) / 4, sum(ys[:-1]) / 4
    return site_from_geojson({"type": "FeatureCollection", "features": [
        feature("boundary", "Polygon", [ring_lonlat], name="Long range"),
        feature("start", "Point", [lon - 0.001, lat], name="S"),
        feature("goal", "Point", [lon + 0.001, lat], name="G"),
    ]})


def test_a_2_km_square_drawn_along_meridians_keeps_its_edge_columns():
    # A square drawn along two meridians and two parallels, coordinates to 7 decimals
    # (about 1 cm) as GIS editors write them. In the site's local transverse Mercator
    # frame its meridian edges lean by the meridian convergence (about 0.01 degree
    # 1 km from the central meridian at 46.8 N), so their ends lie about 0.33 m off
    # the grid's axis: 1.7 % of a 20 m cell. The grid must keep every column and row
    # that the square covers but for such a strip.
    lat0, lon0, half_deg_lat, half_deg_lon = 46.8, 2.7, 0.009, 0.01316
    ring = [[round(lon0 + sx * half_deg_lon, 7), round(lat0 + sy * half_deg_lat, 7)]
            for sx, sy in ((-1, -1), (1, -1), (1, 1), (-1, 1), (-1, -1))]
    site = _large_site(ring)
    grid = rasterise(site, GridSpec(20.0))
    xs, ys = np.asarray(site.boundary.exterior.coords).T
    # The frame polygon is a trapezoid: its height and its narrower (northern) width
    # in whole cells give the rows and columns that lie wholly inside but for the
    # lean of the meridian edges.
    height = ys.max() - ys.min()
    north_width = xs[ys > ys.mean()].max() - xs[ys > ys.mean()].min()
    lean = (xs.max() - xs.min() - north_width) / 2
    assert 0.2 < lean < 0.02 * 20.0  # the premise: the lean is real, and under 2 % of a cell
    expected = math.floor(height / 20.0) * math.floor(north_width / 20.0)
    assert int((grid.label != OUTSIDE).sum()) == expected


def test_a_rotated_2_km_site_keeps_the_cells_it_covers_and_no_others():
    # A 2,000 m x 600 m range rotated 30 degrees; the check is made from the corner
    # positions of every cell against the four edge lines of the projected boundary,
    # not from polygon areas.
    lat0, lon0 = 46.8, 2.7
    t = __import__("pyproj").Transformer.from_crs(
        f"+proj=tmerc +lat_0={lat0} +lon_0={lon0} +k=1 +ellps=WGS84", "EPSG:4326", always_xy=True)
    c, s = math.cos(math.radians(30)), math.sin(math.radians(30))
    corners = [(-1000, -300), (1000, -300), (1000, 300), (-1000, 300), (-1000, -300)]
    ring = [[round(v, 7) for v in t.transform(x * c - y * s, x * s + y * c)] for x, y in corners]
    site = _large_site(ring)
    cell = 20.0
    grid = rasterise(site, GridSpec(cell))
    pts = np.asarray(site.boundary.exterior.coords)[:4]
    # Signed distance of a point outside each edge line (positive = outside), the
    # ring being counter-clockwise.
    def outside_by(px, py):
        worst = np.full(px.shape, -np.inf)
        for a, b in zip(pts, np.roll(pts, -1, axis=0), strict=True):
            ex, ey = b - a
            nx, ny = ey / math.hypot(ex, ey), -ex / math.hypot(ex, ey)
            worst = np.maximum(worst, (px - a[0]) * nx + (py - a[1]) * ny)
        return worst
    rows, cols = np.indices(grid.shape)
    x0, y0 = grid.x0 + cols * cell, grid.y0 + rows * cell
    protrusion = np.max([outside_by(x0 + dx, y0 + dy) for dx in (0, cell) for dy in (0, cell)], axis=0)
    inside = grid.label != OUTSIDE
    # (a) every cell whose four corners lie inside the range is kept,
    assert inside[protrusion <= 0].all()
    # (b) a kept cell loses at most 2 % of its area past an edge at 30 degrees: a
    # corner triangle of area d^2 / (2 sin 30 cos 30) <= 0.02 cell^2, so d <= 0.132 cell
    # (1 cm more for the coordinates' rounding).
    assert protrusion[inside].max() <= math.sqrt(0.02 * 2 * s * c) * cell + 0.01
    # and the ring of partly covered cells along the edges is kept where it should be
    assert int(inside.sum()) > int((protrusion <= 0).sum())


def test_a_hazard_reaching_2_cm_into_a_large_cell_still_makes_it_hazard():
    # Hazards stay conservative at any cell size: only 1 cm of coordinate round-off is
    # ignored, not the 2 % of the side the boundary rule allows.
    # A wall whose western edge lies 2 cm west of the line x = 60 m (0.1 % of a 20 m
    # cell): the column x in [40, 60) is touched by a 2 cm strip and must be hazard.
    # The wall stops at y = 40 m, so the row above it stays open.
    site = metric_site(zone(0, "Wall", "hazard", box(59.98, 0.0, 70.0, 40.0)),
                       start=(10.0, 30.0), goal=(90.0, 30.0), boundary=box(0.0, 0.0, 100.0, 60.0))
    grid = rasterise(site, GridSpec(20.0))
    assert (grid.label[:2, 2] == 0).all()
    assert (grid.label[:, 1] == FREE).all()
