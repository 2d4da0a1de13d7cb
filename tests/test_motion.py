"""The vehicle's motion model: headings, move length, drift and spread, their discretisation."""

from __future__ import annotations

import hashlib
import json
import math
from collections import defaultdict
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal
from scipy.signal import fftconvolve
from scipy.stats import norm

from planner.errors import SettingsError
from planner.grid import FREE, DriftInfo, GridSpec, HazardInfo, default_cell_m, grid_from_arrays, rasterise
from planner.model import EVENT_HAZARD, build_model, policy_chain
from planner.motion import (
    Dynamics,
    axis_distribution,
    heading_bearings_deg,
    heading_vectors,
    landing_distribution,
    landing_tables,
    moves_for,
    moves_within,
)
from planner.site import load_site, site_from_geojson

MAPS = Path(__file__).resolve().parent.parent / "maps"
DATA = Path(__file__).resolve().parent / "data"


def moments(offsets, probs):
    offsets = np.asarray(offsets, dtype=float)
    mean = probs @ offsets
    centred = offsets - mean
    var = probs @ (centred**2) if centred.ndim == 1 else (probs[:, None] * centred).T @ centred
    return mean, var


def as_dict(offsets, probs):
    """A distribution as {offset tuple: probability}, duplicates summed."""
    table = defaultdict(float)
    for o, p in zip(np.asarray(offsets).tolist(), probs, strict=True):
        table[tuple(o) if isinstance(o, list) else (o,)] += float(p)
    return dict(table)


def open_grid(n_rows, n_cols, cell_m, start, drift=None, hazard_rows=()):
    """A free grid, goal in the north-east corner, one drift zone over every cell."""
    label = np.full((n_rows, n_cols), FREE)
    hazards = ()
    for r in hazard_rows:
        label[r, :] = 0
        hazards = (HazardInfo("Drop edge"),)
    goal = np.zeros(label.shape, dtype=bool)
    goal[-1, -1] = True
    kwargs = {}
    if drift is not None:
        kwargs = dict(drifts=(drift,), drift_class=np.ones(label.shape, np.int32), drift_members=((), (0,)))
    return grid_from_arrays(label, goal=goal, start=start, cell_m=cell_m, hazards=hazards, **kwargs)


# ----------------------------------------------------------------------------- regression


@pytest.mark.parametrize("name", ["ground-yard", "drone-range"])
def test_cell_equal_to_move_reproduces_the_per_move_model_exactly(name):
    # The outcome tables of both demo sites at their default cell, move length = cell,
    # default dynamics, recorded with the per-move model before the physical units came
    # in (drift stated there as push_m = drift_per_m * cell and spread_m =
    # spread_per_sqrt_m * sqrt(cell)): every array is bit for bit the same.
    recorded = json.loads((DATA / "outcome-tables-move-equals-cell.json").read_text())[name]
    site = load_site(MAPS / f"{name}.geojson")
    cell = default_cell_m(site)
    assert cell == recorded["cell_m"]
    model = build_model(rasterise(site, GridSpec(cell_m=cell)), Dynamics(move_m=cell))
    for key in ("offsets", "next_state", "prob", "reward", "event", "crossed", "move_m", "penalty_m"):
        array = getattr(model, key)
        assert str(array.dtype) == recorded[key]["dtype"] and list(array.shape) == recorded[key]["shape"], key
        assert hashlib.sha256(array.tobytes()).hexdigest() == recorded[key]["sha256"], key


# ----------------------------------------------------------------------------- headings


def test_headings_are_the_lattice_moves_at_4_and_8_and_22_5_degrees_apart_at_16():
    assert_array_equal(moves_for(4), [(1, 0), (0, 1), (-1, 0), (0, -1)])
    assert_array_equal(moves_for(8), [(1, 0), (1, 1), (0, 1), (-1, 1), (-1, 0), (-1, -1), (0, -1), (1, -1)])
    v = heading_vectors(16)
    bearings = np.degrees(np.arctan2(v[:, 1], v[:, 0])) % 360.0
    assert_allclose(bearings, np.arange(16) * 22.5, atol=1e-12)
    assert_allclose(heading_bearings_deg(16), np.arange(16) * 22.5)
    # Every vector reaches the square of half-side one move length.
    assert_allclose(np.abs(v).max(axis=1), 1.0)


@pytest.mark.parametrize("bad", [3, 6, 12, 32, 0, True])
def test_heading_counts_other_than_4_8_16_are_refused(bad):
    with pytest.raises(SettingsError, match="Dynamics.n_actions must be 4, 8 or 16"):
        Dynamics(n_actions=bad)


def test_a_move_shorter_than_the_cell_is_refused():
    grid = open_grid(5, 5, 2.0, (2, 2))
    with pytest.raises(SettingsError, match=r"Dynamics\.move_m 1.5 m is shorter than the cell \(2 m\)"):
        build_model(grid, Dynamics(move_m=1.5))


def test_budget_in_metres_counts_whole_moves():
    assert moves_within(100.0, 4.5) == 22
    assert moves_within(9.0, 4.5) == 2
    assert moves_within(4.4, 4.5) == 0


@pytest.mark.parametrize("n_headings", [4, 8, 16])
@pytest.mark.parametrize("cells_per_move", [1, 2, 3])
def test_without_drift_the_landing_mean_is_the_move_vector(n_headings, cells_per_move):
    move = 3.0
    cell = move / cells_per_move
    grid = open_grid(15, 15, cell, (7, 7))
    model = build_model(grid, Dynamics(n_actions=n_headings, slip=0.0, move_m=move))
    s = model.start
    cells = np.divmod(np.arange(model.n_states), 15)
    for a, (north, east) in enumerate(heading_vectors(n_headings) * cells_per_move):
        block = model.outcomes(s, a)
        assert_allclose(block["prob"].sum(), 1.0, atol=1e-12)
        r, c = cells[0][block["next_state"]], cells[1][block["next_state"]]
        assert_allclose([block["prob"] @ r - 7, block["prob"] @ c - 7], [north, east], atol=1e-12)
        # A move costs its commanded length in metres.
        assert_allclose(-block["reward"], math.hypot(north, east) * cell, rtol=1e-12)


# ----------------------------------------------------------------------------- one axis


@settings(max_examples=300, deadline=None)
@given(st.floats(-6.0, 6.0), st.floats(0.0, 6.0))
def test_axis_distribution_has_the_stated_mean_and_spread(mean, sd):
    offsets, probs = axis_distribution(mean, sd)
    assert offsets.dtype == np.int64 and np.all(probs > 0) and abs(probs.sum() - 1.0) < 1e-12
    got_mean, got_var = moments(offsets, probs)
    assert_allclose(got_mean, mean, atol=1e-12)
    frac = mean - math.floor(mean)
    least = frac * (1.0 - frac)  # variance of the two integers either side of the mean
    if sd * sd >= least:
        assert_allclose(got_var, sd * sd, atol=1e-9)
    else:
        assert_allclose(got_var, least, atol=1e-9)
        assert set(offsets.tolist()) <= {math.floor(mean), math.floor(mean) + 1}


def test_axis_distribution_examples():
    assert as_dict(*axis_distribution(2.0, 0.0)) == {(2,): 1.0}
    offsets, probs = axis_distribution(0.0, 1.0)
    assert_array_equal(offsets, [-1, 1])
    assert_allclose(probs, [0.5, 0.5], atol=1e-15)
    offsets, probs = axis_distribution(-0.3, 0.0)
    assert_array_equal(offsets, [-1, 0])
    assert_allclose(probs, [0.3, 0.7], atol=1e-15)


def test_a_spread_of_many_cells_keeps_a_gaussian_shape():
    # 5 cells of spread: the points cover +-4 sd and follow the normal density.
    offsets, probs = axis_distribution(0.4, 5.0)
    assert offsets.min() <= -19 and offsets.max() >= 20
    density = norm.pdf(offsets, 0.4, 5.0)
    assert_allclose(probs, density / density.sum(), atol=2e-3)


# ----------------------------------------------------------------------------- zones


@settings(max_examples=100, deadline=None)
@given(st.floats(-3, 3), st.floats(-3, 3), st.floats(0.0, 3.0), st.floats(0.0, 1.0), st.floats(-2, 2),
       st.floats(-2, 2))
def test_chance_mixes_in_the_move_without_drift(east, north, sd, chance, v_north, v_east):
    offsets, probs = landing_distribution((v_north, v_east), [(east, north)], [chance], [sd])
    mean, _ = moments(offsets, probs)
    assert_allclose(mean, [v_north + chance * north, v_east + chance * east], atol=1e-9)


def test_overlapping_zones_add_their_pushes_and_variances():
    # Both act on every move: one Gaussian with the summed mean and summed variance.
    offsets, probs = landing_distribution((1.0, 0.0), [(0.3, -0.7), (1.2, 0.4)], [1.0, 1.0], [0.9, 1.3])
    mean, cov = moments(offsets, probs)
    assert_allclose(mean, [1.0 - 0.7 + 0.4, 0.3 + 1.2], atol=1e-12)
    assert_allclose(np.diag(cov), [0.9**2 + 1.3**2] * 2, atol=1e-9)
    assert_allclose(cov[0, 1], 0.0, atol=1e-12)


@pytest.mark.parametrize("scale", [0.0, 0.5, 1.0, 2.0, 3.7])
def test_drift_scale_scales_push_and_spread(scale):
    drift = DriftInfo("Gust", ratio=0.4, toward_deg=200.0, spread=0.3, chance=0.6)
    grid = open_grid(40, 40, 1.0, (20, 20), drift)
    tables = landing_tables(grid, Dynamics(move_m=2.0), scale)
    stall = 2 * tables.n_dirs - 1  # class 1, no commanded motion
    lo, hi = tables.ptr[stall], tables.ptr[stall + 1]
    mean, _ = moments(np.column_stack([tables.d_row[lo:hi], tables.d_col[lo:hi]]), tables.prob[lo:hi])
    rad = math.radians(200.0)
    assert_allclose(mean, scale * 0.6 * 0.4 * 2.0 * np.array([math.cos(rad), math.sin(rad)]), atol=1e-9)


# ----------------------------------------------------------------------------- outside checks


def _n_move_distribution(tables, block, n):
    """The landing offsets after n independent moves: the n-fold convolution of one block."""
    lo, hi = tables.ptr[block], tables.ptr[block + 1]
    rows, cols, p = tables.d_row[lo:hi], tables.d_col[lo:hi], tables.prob[lo:hi]
    r0, c0 = rows.min(), cols.min()
    one = np.zeros((rows.max() - r0 + 1, cols.max() - c0 + 1))
    np.add.at(one, (rows - r0, cols - c0), p)
    total = one
    for _ in range(n - 1):
        total = np.clip(fftconvolve(total, one), 0.0, None)
    rr, cc = np.indices(total.shape)
    return np.column_stack([(rr + n * r0).ravel(), (cc + n * c0).ravel()]), total.ravel() / total.sum()


@pytest.mark.parametrize("cell_m", [4.0, 2.0, 1.0, 0.5])
@pytest.mark.parametrize("toward_deg", [0.0, 37.0, 135.0, 251.5])
@pytest.mark.parametrize("n_headings", [8, 16])
def test_pure_drift_moments_after_n_moves_are_n_times_one_move(cell_m, toward_deg, n_headings):
    # A property of a locally consistent discretisation (Kushner & Dupuis, Numerical
    # Methods for Stochastic Control Problems in Continuous Time, 2nd ed., 2001, ch. 5):
    # the mean and variance of each move are the continuous ones, so after n moves the
    # landing point's mean is n (move + push) and its variance n sigma^2 L per axis,
    # whatever the cell, as long as the spread covers the fractional means (sigma >=
    # half a cell). Worked out by hand from the zone's physical figures.
    move, ratio, spread, n = 4.0, 0.35, 1.0, 4
    drift = DriftInfo("Gust", ratio=ratio, toward_deg=toward_deg, spread=spread)
    side = int(math.ceil(20.0 / cell_m))  # the tables only check that a move fits in the grid
    grid = open_grid(side, side, cell_m, (1, 1), drift)
    tables = landing_tables(grid, Dynamics(n_actions=n_headings, move_m=move))
    sd_m = spread * math.sqrt(move)
    rad = math.radians(toward_deg)
    for heading, (v_north, v_east) in enumerate(heading_vectors(n_headings)):
        offsets, probs = _n_move_distribution(tables, tables.n_dirs + heading, n)
        mean, cov = moments(offsets * cell_m, probs)
        push = ratio * move * np.array([math.cos(rad), math.sin(rad)])
        assert_allclose(mean, n * (move * np.array([v_north, v_east]) + push), atol=1e-9)
        assert_allclose(np.diag(cov), [n * sd_m**2] * 2, atol=1e-9)
        assert_allclose(cov[0, 1], 0.0, atol=1e-9)


def _gaussian_walk_crossing(d, s, n, dx=0.002):
    """P(max of a Gaussian walk's first n partial sums >= d), steps N(0, s^2), by direct
    numerical integration of the killed density on a fine line (independent of the code)."""
    x = np.arange(-12.0 * s * math.sqrt(n), d, dx)
    f = norm.pdf(x, 0.0, s) * dx
    k = np.arange(-6 * s, 6 * s + dx / 2, dx)
    kernel = norm.pdf(k, 0.0, s)
    kernel /= kernel.sum()
    for _ in range(n - 1):
        f = np.convolve(f, kernel, mode="full")[len(k) // 2: len(k) // 2 + len(x)]
    return 1.0 - f.sum()


def _bgk(d, sigma, move, travel):
    # Broadie, Glasserman & Kou, "A continuity correction for discrete barrier options",
    # Mathematical Finance 7(4), 1997: a Gaussian walk monitored every s^2 of variance
    # crosses d about as often as a continuous one crosses d + 0.5826 s.
    s = sigma * math.sqrt(move)
    return 2.0 * (1.0 - norm.cdf((d + 0.5826 * s) / (sigma * math.sqrt(travel))))


def _lane_chain_crossing(cell_m, d, sigma, move, n):
    """P(drop edge within n moves) of the model's chain on a straight lane heading east."""
    below = int(math.ceil(5.0 * sigma * math.sqrt(n * move) / cell_m)) + 2
    above = int(round(d / cell_m - 0.5))  # start centre d below the edge's cell side
    n_rows = below + above + 2
    n_cols = int(math.ceil((n * move + 5 * sigma * math.sqrt(n * move)) / cell_m)) + 4
    start = (below, 1)
    grid = open_grid(n_rows, n_cols, cell_m, start, DriftInfo("Slope", ratio=0.0, spread=sigma),
                     hazard_rows=(below + above + 1,))
    model = build_model(grid, Dynamics(n_actions=4, slip=0.0, move_m=move, edge="wall"))
    east = np.zeros((model.n_states, 4))
    east[:, 1] = 1.0
    chain = policy_chain(model, east)
    x = np.zeros(model.n_states)
    x[model.start] = 1.0
    hit = 0.0
    for _ in range(n):
        hit += float(x @ chain.absorb[:, EVENT_HAZARD].toarray().ravel())
        x = chain.transient.T @ x
    return hit


def test_barrier_crossing_converges_to_the_discretely_monitored_walk():
    # A drop edge d = 2.5 m to the side of a straight lane, lateral spread sigma = 0.5 m
    # per sqrt(m), moves of L = 1 m, travel X = 16 m (n = 16 moves). The chain's
    # P(edge within X) must approach the Gaussian walk monitored at every move: our own
    # numerical integration of that walk (0.1663) and the continuity-corrected
    # reflection formula (0.1628, which approximates it to about 0.004 at n = 16).
    d, sigma, move, n = 2.5, 0.5, 1.0, 16
    walk = _gaussian_walk_crossing(d, sigma * math.sqrt(move), n)
    bgk = _bgk(d, sigma, move, n * move)
    assert abs(walk - bgk) < 0.005
    errors = [abs(_lane_chain_crossing(cell, d, sigma, move, n) - walk) for cell in (1.0, 1 / 3, 1 / 5)]
    # The error shrinks with the cell, and at the finest cell the chain is within
    # 0.006 of the reflection formula (its own error included).
    assert errors[0] > errors[1] > errors[2]
    assert errors[2] < 0.003 and abs(errors[2]) + abs(walk - bgk) < 0.006


# ----------------------------------------------------------------------------- true bearings


def test_true_north_drift_under_a_far_utm_zone_follows_the_meridian_convergence():
    # A site at 8.4 E, 50 N worked in UTM zone 31N (central meridian 3 E): grid north is
    # turned from true north by the meridian convergence, which pyproj's point factors
    # give; a drift due true north must point along the projected true-north direction.
    from pyproj import Proj, Transformer

    lon, lat = 8.4, 50.0
    dlon, dlat = 0.004, 0.003

    def ring(x0, y0, x1, y1):
        return [[[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]]

    def feat(role, kind, coords, **props):
        return {"type": "Feature", "properties": {"role": role, **props},
                "geometry": {"type": kind, "coordinates": coords}}

    obj = {"type": "FeatureCollection", "properties": {"site_schema": 2}, "features": [
        feat("boundary", "Polygon", ring(lon - dlon, lat - dlat, lon + dlon, lat + dlat), name="Far yard"),
        feat("start", "Point", [lon - 0.003, lat], name="Start"),
        feat("goal", "Point", [lon + 0.003, lat], name="Goal"),
        feat("drift", "Polygon", ring(lon - 0.001, lat - 0.001, lon + 0.001, lat + 0.001), name="Northward",
             toward_deg=0.0, drift_per_m=0.2),
    ]}
    with pytest.warns(UserWarning, match="distorts distances by up to"):
        site = site_from_geojson(obj, crs="EPSG:32631")
    zone = site.drifts[0]
    p = zone.geometry.representative_point()
    to_lonlat = Transformer.from_crs("EPSG:32631", "EPSG:4326", always_xy=True)
    plon, plat = to_lonlat.transform(p.x, p.y)
    convergence = Proj("EPSG:32631").get_factors(plon, plat).meridian_convergence
    assert convergence > 3.0  # far from the central meridian, the effect is large
    # Independently: project a short step due true north and measure its grid bearing.
    to_xy = Transformer.from_crs("EPSG:4326", "EPSG:32631", always_xy=True)
    x0, y0 = to_xy.transform(plon, plat)
    x1, y1 = to_xy.transform(plon, plat + 1e-4)
    measured = math.degrees(math.atan2(x1 - x0, y1 - y0)) % 360.0
    assert abs(((zone.grid_toward_deg - measured + 180) % 360) - 180) < 0.01
    assert abs(((zone.grid_toward_deg + convergence + 180) % 360) - 180) < 0.01
    east, north = zone.drift_vector()
    assert_allclose(math.degrees(math.atan2(east, north)) % 360.0, zone.grid_toward_deg, atol=1e-9)
