"""The outcome kernels against their plain-Python reference on tiny grids."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from conftest import small_site_dict

from planner.grid import GridSpec, rasterise
from planner.model import build_model, kernel_inputs
from planner.motion import Dynamics
from planner.outcomes import EVENT_BOUNDARY, EVENT_GOAL, EVENT_HAZARD, _trace, reference_outcomes, swept_cells
from planner.site import site_from_geojson


@pytest.mark.parametrize("r0, c0", [(10, 10), (3, 17)])
def test_the_kernel_traversal_is_the_segment_through_the_closed_cells(r0, c0):
    # Every displacement up to 7 cells each way, corners included: the kernel's integer
    # walk gives the cells, in order, that the exact parametric test gives.
    path_r, path_c = np.empty(64, np.int64), np.empty(64, np.int64)
    for dr, dc in itertools.product(range(-7, 8), repeat=2):
        if (dr, dc) == (0, 0):
            continue
        n = _trace(r0, c0, dr, dc, path_r, path_c)
        assert list(zip(path_r[:n].tolist(), path_c[:n].tolist(), strict=True)) == swept_cells(
            r0, c0, r0 + dr, c0 + dc), (dr, dc)


def test_a_move_through_a_corner_checks_both_side_cells_first():
    # From (0, 0) to (2, 2) the segment passes exactly through the corners (1, 1) and
    # (2, 2) of the lattice (in cell units from the start's south-west corner).
    assert swept_cells(0, 0, 2, 2) == [(0, 1), (1, 0), (1, 1), (1, 2), (2, 1), (2, 2)]
    assert swept_cells(0, 0, -1, -1) == [(0, -1), (-1, 0), (-1, -1)]


def _site(ends_run: bool):
    data = small_site_dict()
    data["features"][3]["properties"]["ends_run"] = ends_run  # the pond
    return site_from_geojson(data)


CASES = {
    "8 headings, one-cell moves": (True, 10.0, Dynamics(n_actions=8, slip=0.1, stall=0.05)),
    "16 headings, two-cell moves, wall": (True, 5.0, Dynamics(n_actions=16, slip=0.1, move_m=10.0, edge="wall")),
    "4 headings, a pond that does not end the run": (False, 10.0, Dynamics(n_actions=4, slip=0.2)),
    "8 headings, three-cell moves": (False, 4.0, Dynamics(n_actions=8, slip=0.1, move_m=12.0)),
}


@pytest.mark.parametrize("case", list(CASES))
def test_the_outcome_table_equals_the_reference_for_every_state_and_action(case):
    ends_run, cell, dynamics = CASES[case]
    grid = rasterise(_site(ends_run), GridSpec(cell))
    model = build_model(grid, dynamics)
    cells, moves, *_ = kernel_inputs(grid, dynamics)
    events, crossings = set(), False
    for s in np.flatnonzero(model.active):
        for a in range(model.n_actions):
            lo, hi = model.offsets[s * model.n_actions + a], model.offsets[s * model.n_actions + a + 1]
            got = {(int(model.next_state[k]), int(model.event[k]), int(model.crossed[k])):
                   (float(model.prob[k]), float(model.reward[k])) for k in range(lo, hi)}
            expected = reference_outcomes(cells, moves, int(s), a)
            assert set(got) == set(expected), (s, a)
            for key, (p, reward) in expected.items():
                assert got[key][0] == pytest.approx(p, abs=1e-12) and got[key][1] == pytest.approx(reward, abs=1e-9)
            events |= {key[1] for key in got}
            crossings |= any(key[2] for key in got)
    # the cases exercise every kind of ending (the wall case has no boundary incidents)
    assert EVENT_GOAL in events
    assert (EVENT_BOUNDARY in events) == (dynamics.edge == "boundary")
    assert any(e >= EVENT_HAZARD for e in events) == ends_run
    assert crossings == (not ends_run)  # a pond that does not end the run is crossed
