"""Routes: cell polyline, waypoint simplification, clearances."""

from __future__ import annotations

import math

import numpy as np
import pytest
import shapely
from conftest import ORIGIN_LAT, ORIGIN_LON, hazard_free_route, small_site_dict
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from pyproj import Transformer
from shapely.geometry import LineString, Polygon, box

from planner.errors import SettingsError
from planner.grid import DRAWING_TOLERANCE_M, GridSpec, descend, rasterise
from planner.model import EVENT_HAZARD, Dynamics, build_model
from planner.motion import moves_for
from planner.route import (
    CLEARANCE_TOLERANCE_M,
    NominalPath,
    Route,
    build_route,
    nominal_path,
    simplify_path,
)
from planner.site import site_from_geojson

#: lon/lat to the conftest's own metres (the tmerc its test sites were drawn in).
TEST_METRES = Transformer.from_crs(
    "EPSG:4326", f"+proj=tmerc +lat_0={ORIGIN_LAT} +lon_0={ORIGIN_LON} +k=1 +ellps=WGS84 +units=m", always_xy=True)


@pytest.fixture(scope="module")
def planned():
    """The small test site with drift switched off, and its greedy shortest route."""
    site = site_from_geojson(small_site_dict())
    grid = rasterise(site, GridSpec(2.0))
    model = build_model(grid, Dynamics(drift_scale=0.0))
    path = nominal_path(model, descend(grid, model.n_actions))
    return site, grid, model, path, build_route("shortest", path, grid, site, model)


# ----------------------------------------------------------------------------- simplification, by hand


def test_simplify_keeps_the_corner_around_a_hazard():
    # An L around the corner of a 2 m square hazard, every vertex 1 m from it. The
    # diagonal shortcut from the first vertex to any vertex of the second arm passes
    # closer than 1 m (to (0,1)-(5,2), the corner (4, 2) is 1/sqrt(26) m away), so only
    # the corner survives: [0, 5, 9], total length 5 + 4 = 9 m.
    points = np.array([(x, 1.0) for x in range(6)] + [(5.0, y) for y in range(2, 6)])
    hazard = box(2.0, 2.0, 4.0, 4.0)
    kept = simplify_path(points, [hazard])
    assert kept.tolist() == [0, 5, 9]
    legs = np.hypot(*np.diff(points[kept], axis=0).T)
    assert_allclose(legs.sum(), 9.0, rtol=0, atol=1e-12)
    # With no hazard, the whole L is one leg.
    assert simplify_path(points, []).tolist() == [0, 9]


def test_simplify_straightens_a_staircase_far_from_hazards():
    points = np.array([(k, k // 2) for k in range(10)], dtype=float)
    hazard = box(100.0, 100.0, 101.0, 101.0)
    assert simplify_path(points, [hazard]).tolist() == [0, 9]


def test_simplify_stays_inside_the_boundary():
    # A 10 m square missing its north-east 6 m square; the path goes round the notch.
    # (2,8)->(8,2) would cross the notch at (5,5); (2,8)->(5,2) stays west and south of
    # it (x > 4 only where y < 4), so the farthest legal reach from the first vertex is
    # vertex 3, then the last: [0, 3, 4].
    boundary = box(0.0, 0.0, 10.0, 10.0).difference(box(4.0, 4.0, 10.0, 10.0))
    points = np.array([(2.0, 8.0), (2.0, 5.0), (2.0, 2.0), (5.0, 2.0), (8.0, 2.0)])
    assert simplify_path(points, [], boundary).tolist() == [0, 3, 4]
    assert simplify_path(points, []).tolist() == [0, 4]


def test_simplify_short_paths_and_bad_input():
    assert simplify_path(np.array([[1.0, 2.0]])).tolist() == [0]
    assert simplify_path(np.array([[1.0, 2.0], [3.0, 2.0]])).tolist() == [0, 1]
    with pytest.raises(SettingsError, match=r"\(n, 2\)"):
        simplify_path(np.zeros((0, 2)))
    with pytest.raises(SettingsError, match="not finite"):
        simplify_path(np.array([[0.0, 0.0], [np.nan, 1.0]]))


# ----------------------------------------------------------------------------- simplification, property


def _check_no_leg_closer(points, kept, hazards, boundary):
    """Independent check, one leg and one hazard at a time with plain shapely objects."""
    assert kept[0] == 0 and kept[-1] == len(points) - 1
    assert np.all(np.diff(kept) > 0)
    for i, j in zip(kept[:-1], kept[1:], strict=True):
        leg = LineString([points[i], points[j]])
        for h in hazards:
            replaced = min(LineString([points[k], points[k + 1]]).distance(h) for k in range(i, j))
            assert leg.distance(h) >= replaced - CLEARANCE_TOLERANCE_M
        if boundary is not None and j > i + 1:
            assert boundary.covers(leg)
    # The whole simplified polyline is no closer to any hazard than the whole cell path.
    if len(points) >= 2:
        before, after = LineString(points), LineString(points[kept])
        for h in hazards:
            assert after.distance(h) >= before.distance(h) - CLEARANCE_TOLERANCE_M


@st.composite
def scenes(draw):
    """A king-move walk over a small grid (no repeated cell), hazards and a boundary."""
    n = draw(st.integers(3, 9))
    cell_m = draw(st.sampled_from([1.0, 2.0, 2.5]))
    # A far offset checks the clearance comparison at projected-CRS coordinates.
    x0, y0 = draw(st.sampled_from([(0.0, 0.0), (512_345.0, 5_312_345.0)]))
    r, c = draw(st.integers(0, n - 1)), draw(st.integers(0, n - 1))
    cells, seen = [(r, c)], {(r, c)}
    for a in draw(st.lists(st.integers(0, 7), min_size=1, max_size=30)):
        dr, dc = moves_for(8)[a]
        nxt = (cells[-1][0] + int(dr), cells[-1][1] + int(dc))
        if 0 <= nxt[0] < n and 0 <= nxt[1] < n and nxt not in seen:
            cells.append(nxt)
            seen.add(nxt)
    points = np.array([(x0 + (cc + 0.5) * cell_m, y0 + (rr + 0.5) * cell_m) for rr, cc in cells])
    coord = st.floats(0.0, n * cell_m, allow_nan=False)
    hazards = []
    for kind in draw(st.lists(st.sampled_from(["cells", "triangle"]), max_size=3)):
        if kind == "cells":
            blocks = draw(st.lists(st.tuples(st.integers(0, n - 1), st.integers(0, n - 1)), min_size=1, max_size=6))
            geom = shapely.union_all([box(x0 + bc * cell_m, y0 + br * cell_m, x0 + (bc + 1) * cell_m,
                                          y0 + (br + 1) * cell_m) for br, bc in blocks])
        else:
            tri = Polygon([(x0 + draw(coord), y0 + draw(coord)) for _ in range(3)])
            if not tri.is_valid or tri.area < 1e-3:
                continue
            geom = tri
        hazards.append(geom)
    boundary = None
    if draw(st.booleans()):
        boundary = box(x0, y0, x0 + n * cell_m, y0 + n * cell_m)
        if draw(st.booleans()):
            nx, ny = draw(coord), draw(coord)
            boundary = boundary.difference(box(x0 + nx, y0 + ny, x0 + n * cell_m, y0 + n * cell_m))
    return points, hazards, boundary


@settings(max_examples=150, deadline=None)
@given(scenes())
def test_simplified_legs_never_closer_to_a_hazard(scene):
    points, hazards, boundary = scene
    kept = simplify_path(points, hazards, boundary)
    _check_no_leg_closer(points, kept, hazards, boundary)


# ----------------------------------------------------------------------------- routes on a site


def test_route_follows_the_cells_to_the_goal_centre(planned):
    site, grid, model, path, route = planned
    assert isinstance(route, Route)
    assert route.reached_goal and route.end_event == "goal" and route.name == "shortest"
    east, north = grid.centres()
    goal_r, goal_c = np.unravel_index(path.end_state, grid.shape)
    assert grid.goal[goal_r, goal_c]
    start_r, start_c = grid.start
    assert_allclose(route.path_m[0], [east[start_r, start_c], north[start_r, start_c]], rtol=0, atol=1e-9)
    assert_allclose(route.path_m[-1], [east[goal_r, goal_c], north[goal_r, goal_c]], rtol=0, atol=1e-9)
    assert route.path_m.shape == (path.states.size + 1, 2)
    assert route.n_moves == path.n_moves == path.states.size
    # Length counted move by move: straight moves are one cell side, diagonals sqrt(2).
    rows, cols = np.unravel_index(np.append(path.states, path.end_state), grid.shape)
    n_diag = int(np.sum((np.diff(rows) != 0) & (np.diff(cols) != 0)))
    n_straight = route.n_moves - n_diag
    assert_allclose(route.length_m, 2.0 * (n_straight + math.sqrt(2.0) * n_diag), rtol=1e-12)
    # The first and last waypoints are the first and last cells.
    first, last = route.waypoints[0], route.waypoints[-1]
    assert_allclose([first.east_m, first.north_m], route.path_m[0], rtol=0, atol=1e-12)
    assert_allclose([last.east_m, last.north_m], route.path_m[-1], rtol=0, atol=1e-12)
    assert len(route.waypoints) < len(route.path_m)


def test_waypoint_legs_and_lonlat(planned):
    site, _grid, _model, _path, route = planned
    xy = route.waypoint_xy()
    assert [w.seq for w in route.waypoints] == list(range(len(route.waypoints)))
    legs = np.array([w.leg_m for w in route.waypoints])
    assert legs[0] == 0.0
    assert_allclose(legs[1:], np.hypot(*np.diff(xy, axis=0).T), rtol=1e-12)
    assert_allclose([w.cumulative_m for w in route.waypoints], np.cumsum(legs), rtol=1e-12)
    assert_allclose(route.waypoint_length_m, legs.sum(), rtol=1e-12)
    # A straight line is never longer than the cell path it replaces.
    assert route.waypoint_length_m <= route.length_m + 1e-9
    x, y = site.frame.to_xy([w.lon for w in route.waypoints], [w.lat for w in route.waypoints])
    assert_allclose(np.column_stack([x, y]), xy, rtol=0, atol=1e-6)


def test_waypoint_clearance_matches_the_pond_in_the_test_frame(planned):
    # The pond is the rectangle 40..60 x 20..40 m in the conftest's own tmerc frame; the
    # distance from a point to an axis-aligned rectangle is hypot of the per-axis gaps.
    # Measured in that frame from each waypoint's lon/lat, independently of the site's
    # frame and of shapely. The two transverse Mercator frames differ in scale by far
    # less than 1e-9 over 100 m, so 1 mm is a generous tolerance.
    _site, _grid, _model, _path, route = planned
    x, y = TEST_METRES.transform([w.lon for w in route.waypoints], [w.lat for w in route.waypoints])
    gap_x = np.maximum.reduce([40.0 - np.asarray(x), np.asarray(x) - 60.0, np.zeros(len(x))])
    gap_y = np.maximum.reduce([20.0 - np.asarray(y), np.asarray(y) - 40.0, np.zeros(len(y))])
    expected = np.hypot(gap_x, gap_y)
    assert_allclose([w.clearance_m for w in route.waypoints], expected, rtol=0, atol=1e-3)
    assert {w.nearest_hazard for w in route.waypoints} == {"Pond"}


def test_route_clearance_not_below_the_cell_path(planned):
    site, _grid, _model, _path, route = planned
    pond = site.hazards[0].geometry
    cell_path = LineString(route.path_m)
    waypoints = LineString(route.waypoint_xy())
    assert route.min_clearance_hazard == "Pond"
    assert_allclose(route.min_clearance_m, waypoints.distance(pond), rtol=0, atol=1e-9)
    assert route.min_clearance_m >= cell_path.distance(pond) - CLEARANCE_TOLERANCE_M
    # Conservative labels keep the cells of the path off the buffered pond (2 m
    # buffer), so the row of centres along its side is half a cell (1 m) beyond the
    # buffer: 3 m from the true pond, less the grid's drawing tolerance for overlaps.
    assert route.min_clearance_m >= 3.0 - DRAWING_TOLERANCE_M
    kept = simplify_path(route.path_m, [pond], site.boundary)
    _check_no_leg_closer(route.path_m, kept, [pond], site.boundary)


def test_route_that_ends_in_a_hazard_stops_before_it(planned):
    site, grid, model, _path, _route = planned
    # Start cell, two cells east, then a move into the pond (hazard 0).
    r0, c0 = grid.start
    states = np.ravel_multi_index(([r0, r0, r0], [c0, c0 + 1, c0 + 2]), grid.shape)
    pond_cell = int(np.flatnonzero(grid.label.ravel() == 0)[0])
    path = NominalPath(states.astype(np.int64), EVENT_HAZARD + 0, pond_cell)
    route = build_route("cautious", path, grid, site, model)
    assert not route.reached_goal and route.end_event == "Pond"
    assert route.n_moves == 3
    assert route.path_m.shape == (3, 2)
    assert_allclose(route.length_m, 4.0, rtol=1e-12)
    assert len(route.waypoints) == 2  # a straight run of three cells is one leg

    single = build_route("cautious", NominalPath(states[:1].astype(np.int64), -1, int(states[0])), grid, site, model)
    assert single.end_event == "loop" and len(single.waypoints) == 1
    assert single.waypoints[0].leg_m == 0.0 and single.length_m == 0.0


def test_route_without_hazards_has_infinite_clearance():
    site, grid, model, route = hazard_free_route()
    assert route.reached_goal
    assert math.isinf(route.min_clearance_m) and route.min_clearance_hazard is None
    assert all(math.isinf(w.clearance_m) and w.nearest_hazard is None for w in route.waypoints)
    # Start and goal sit on one row: without hazards the route is one straight leg.
    assert len(route.waypoints) == 2


def test_build_route_refuses_mismatched_inputs(planned):
    site, grid, model, path, _route = planned
    other = rasterise(site, GridSpec(5.0))
    with pytest.raises(SettingsError, match="model shape"):
        build_route("shortest", path, other, site, model)
    with pytest.raises(SettingsError, match="cell indices"):
        build_route("shortest", NominalPath(np.array([grid.n_cells], dtype=np.int64), -1, 0), grid, site, model)
    with pytest.raises(SettingsError, match="end event"):
        build_route("shortest", NominalPath(path.states, 99, 0), grid, site, model)
