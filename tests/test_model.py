"""The transition model: outcome tables, swept paths, edges, and a reference environment."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import text_map_grid
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from planner.errors import SettingsError
from planner.grid import FREE, OUTSIDE, DriftInfo, HazardInfo, grid_from_arrays
from planner.model import (
    EVENT_BOUNDARY,
    EVENT_GOAL,
    EVENT_HAZARD,
    EVENT_NONE,
    Dynamics,
    build_model,
    epsilon_greedy,
    policy_chain,
)

FROZEN_LAKE_4X4 = ["SFFF", "FHFH", "FFFH", "HFFG"]


def frozen_lake_grid():
    """gymnasium's 4x4 FrozenLake map as a grid (holes end the run)."""
    return text_map_grid(FROZEN_LAKE_4X4)


def test_frozen_lake_matches_gymnasium_table():
    # Reference: gymnasium's FrozenLake-v1 (Farama Foundation, gymnasium 1.x,
    # toy_text/frozen_lake.py), is_slippery=True: the intended move and the two
    # perpendicular ones each with probability 1/3, edges are walls, holes and the
    # goal end the episode. We compare its own transition table P state by state and
    # action by action.
    gym = pytest.importorskip("gymnasium")
    env = gym.make("FrozenLake-v1", map_name="4x4", is_slippery=True).unwrapped
    grid = frozen_lake_grid()
    model = build_model(grid, Dynamics(n_actions=4, slip=2 / 3, edge="wall", step_cost="move"))
    n = 4
    # gymnasium actions: 0 left, 1 down, 2 right, 3 up; ours: 0 N, 1 E, 2 S, 3 W.
    ours_for_gym = {0: 3, 1: 2, 2: 1, 3: 0}

    def ours_state(gs):
        row_from_top, col = divmod(gs, n)
        return (n - 1 - row_from_top) * n + col

    checked = 0
    for gs in range(n * n):
        s = ours_state(gs)
        if not model.active[s]:
            continue
        for ga in range(4):
            expected: dict[tuple[int, bool], float] = {}
            for p, gnext, _reward, terminated in env.P[gs][ga]:
                key = (ours_state(gnext), bool(terminated))
                expected[key] = expected.get(key, 0.0) + p
            block = model.outcomes(s, ours_for_gym[ga])
            got: dict[tuple[int, bool], float] = {}
            for nxt, p, ev in zip(block["next_state"], block["prob"], block["event"], strict=True):
                key = (int(nxt), bool(ev != EVENT_NONE))
                got[key] = got.get(key, 0.0) + p
            assert got.keys() == expected.keys(), (gs, ga)
            for key, p in expected.items():
                assert_allclose(got[key], p, atol=1e-12)
            checked += 1
    assert checked == 11 * 4  # 16 cells less 4 holes and the goal


def test_frozen_lake_has_eleven_active_states():
    model = build_model(frozen_lake_grid(), Dynamics(n_actions=4, slip=2 / 3, edge="wall"))
    assert int(model.active.sum()) == 11


@st.composite
def small_grids(draw):
    n_rows = draw(st.integers(3, 7))
    n_cols = draw(st.integers(3, 7))
    cells = n_rows * n_cols
    kinds = draw(st.lists(st.sampled_from([FREE, FREE, FREE, 0, 1, OUTSIDE]), min_size=cells, max_size=cells))
    label = np.array(kinds, dtype=np.int16).reshape(n_rows, n_cols)
    start = (draw(st.integers(0, n_rows - 1)), draw(st.integers(0, n_cols - 1)))
    goal_cell = (draw(st.integers(0, n_rows - 1)), draw(st.integers(0, n_cols - 1)))
    if goal_cell == start:
        goal_cell = ((start[0] + 1) % n_rows, start[1])
    label[start] = FREE
    label[goal_cell] = FREE
    goal = np.zeros(label.shape, dtype=bool)
    goal[goal_cell] = True
    drift = DriftInfo("gust", draw(st.floats(-3, 3)), draw(st.floats(-3, 3)), draw(st.floats(0, 2)),
                      draw(st.floats(0, 1)))
    drift_class = np.array(draw(st.lists(st.integers(0, 1), min_size=cells, max_size=cells))).reshape(label.shape)
    grid = grid_from_arrays(label, goal=goal, start=start, cell_m=2.0,
                            hazards=(HazardInfo("pit", True, 50.0), HazardInfo("puddle", False, 5.0)),
                            drifts=(drift,), drift_class=drift_class, drift_members=((), (0,)))
    dynamics = Dynamics(n_actions=draw(st.sampled_from([4, 8])), slip=draw(st.floats(0, 0.5)),
                        stall=draw(st.floats(0, 0.3)), edge=draw(st.sampled_from(["boundary", "wall"])),
                        drift_scale=draw(st.floats(0, 2)), hazard_penalty_m=100.0)
    return grid, dynamics


@settings(max_examples=40, deadline=None)
@given(small_grids())
def test_outcome_probabilities_sum_to_one_and_stay_on_grid(case):
    grid, dynamics = case
    try:
        model = build_model(grid, dynamics)
    except SettingsError as err:
        # A drift wider than the whole grid is refused by design; nothing else may fail.
        assert "more than the whole grid" in str(err)
        assume(False)
    counts = np.diff(model.offsets).reshape(model.n_states, model.n_actions)
    assert np.all(counts[model.active] > 0)
    assert np.all(counts[~model.active] == 0)
    pair = np.repeat(np.arange(model.n_states * model.n_actions), np.diff(model.offsets))
    sums = np.bincount(pair, weights=model.prob, minlength=model.n_states * model.n_actions)
    assert_allclose(sums.reshape(counts.shape)[model.active], 1.0, atol=1e-12)
    assert np.all((model.prob > 0) & (model.prob <= 1 + 1e-12))
    going = model.event == EVENT_NONE
    assert np.all(model.next_state[going] >= 0)
    assert np.all(model.next_state < model.n_states)
    assert np.all(model.active[model.next_state[going]])
    # Duplicates are merged: no (state, action) lists the same outcome twice.
    keys = np.stack([pair, model.next_state, model.event, model.crossed], axis=1)
    assert len(np.unique(keys, axis=0)) == len(keys)


def _line_grid(label_row, goal_col):
    label = np.array([label_row], dtype=np.int16)
    goal = np.zeros(label.shape, dtype=bool)
    goal[0, goal_col] = True
    return label, goal


def test_diagonal_move_between_two_hazard_cells_is_an_incident():
    # Swept path: a diagonal move passes exactly through the shared corner, so both
    # side cells are crossed (corner-cutting counts).
    label = np.full((3, 3), FREE, dtype=np.int16)
    label[1, 0] = 0  # north of the start
    goal = np.zeros((3, 3), dtype=bool)
    goal[2, 2] = True
    grid = grid_from_arrays(label, goal=goal, start=(0, 0), hazards=(HazardInfo("post", True, 50.0),))
    model = build_model(grid, Dynamics(slip=0.0, hazard_penalty_m=50.0))
    ne = model.outcomes(0, 1)  # action 1 = north-east
    assert ne["event"].tolist() == [EVENT_HAZARD + 0]
    assert_allclose(ne["reward"], -(np.sqrt(2.0) + 50.0))
    east = model.outcomes(0, 2)
    assert east["event"].tolist() == [EVENT_NONE] and east["next_state"].tolist() == [1]


def test_leaving_the_boundary_is_an_incident_or_a_wall():
    label = np.full((2, 3), FREE, dtype=np.int16)
    goal = np.zeros((2, 3), dtype=bool)
    goal[1, 2] = True
    grid = grid_from_arrays(label, goal=goal, start=(0, 0))
    incident = build_model(grid, Dynamics(n_actions=4, slip=0.0, hazard_penalty_m=40.0))
    south = incident.outcomes(0, 2)
    assert south["event"].tolist() == [EVENT_BOUNDARY]
    assert_allclose(south["reward"], -41.0)
    wall = build_model(grid, Dynamics(n_actions=4, slip=0.0, edge="wall", hazard_penalty_m=40.0))
    south = wall.outcomes(0, 2)
    assert south["event"].tolist() == [EVENT_NONE] and south["next_state"].tolist() == [0]


def test_goal_crossed_on_the_way_ends_the_run_as_success():
    # A drift of two cells east carries the vehicle through the goal cell: the first
    # goal cell on the swept path ends the run.
    label, goal = _line_grid([FREE, FREE, FREE, FREE, FREE], 2)
    grid = grid_from_arrays(label, goal=goal, start=(0, 0), drifts=(DriftInfo("push", 2.0, 90.0),),
                            drift_class=np.ones(label.shape, dtype=np.int32), drift_members=((), (0,)))
    model = build_model(grid, Dynamics(n_actions=4, slip=0.0, edge="wall", hazard_penalty_m=40.0))
    east = model.outcomes(0, 1)
    assert east["event"].tolist() == [EVENT_GOAL] and east["next_state"].tolist() == [2]


def test_slip_and_stall_split_as_documented():
    label = np.full((5, 5), FREE, dtype=np.int16)
    goal = np.zeros((5, 5), dtype=bool)
    goal[4, 4] = True
    grid = grid_from_arrays(label, goal=goal, start=(2, 2))
    model = build_model(grid, Dynamics(n_actions=8, slip=0.2, stall=0.1, hazard_penalty_m=40.0))
    s = 2 * 5 + 2
    block = model.outcomes(s, 0)  # north; slips to NE and NW
    got = dict(zip(block["next_state"].tolist(), block["prob"].tolist(), strict=True))
    assert_allclose([got[3 * 5 + 2], got[3 * 5 + 3], got[3 * 5 + 1], got[s]], [0.7, 0.1, 0.1, 0.1])


def test_non_ending_hazard_is_charged_once_and_the_run_goes_on():
    label, goal = _line_grid([FREE, 0, 0, FREE], 3)
    grid = grid_from_arrays(label, goal=goal, start=(0, 0), hazards=(HazardInfo("mud", False, 7.0),),
                            drifts=(DriftInfo("push", 1.0, 90.0),),
                            drift_class=np.ones(label.shape, dtype=np.int32), drift_members=((), (0,)))
    model = build_model(grid, Dynamics(n_actions=4, slip=0.0, edge="wall", hazard_penalty_m=40.0))
    east = model.outcomes(0, 1)  # move one east plus one drift: crosses both mud cells
    assert east["event"].tolist() == [EVENT_NONE]
    assert east["next_state"].tolist() == [2]
    assert east["crossed"].tolist() == [1]
    assert_allclose(east["reward"], -(1.0 + 7.0))


def test_policy_chain_rows_are_distributions():
    grid = frozen_lake_grid()
    model = build_model(grid, Dynamics(n_actions=4, slip=2 / 3, edge="wall"))
    probs = epsilon_greedy(np.zeros(model.n_states, dtype=int), 4, 0.3)
    chain = policy_chain(model, probs)
    total = np.asarray(chain.transient.sum(axis=1)).ravel() + np.asarray(chain.absorb.sum(axis=1)).ravel()
    assert_allclose(total[model.active], 1.0, atol=1e-12)
    assert_allclose(total[~model.active], 0.0)


def test_dynamics_refuse_out_of_range_settings():
    with pytest.raises(SettingsError, match=r"Dynamics\.slip must be a number in \[0, 1\], got 1\.5"):
        Dynamics(slip=1.5)
    with pytest.raises(SettingsError, match="Dynamics.n_actions must be 4, 8 or 16, got 6"):
        Dynamics(n_actions=6)
    with pytest.raises(SettingsError, match="Dynamics.edge must be 'boundary' or 'wall', got 'bounce'"):
        Dynamics(edge="bounce")
    with pytest.raises(SettingsError, match="Dynamics.hazard_penalty_m must be a positive number of metres"):
        Dynamics(hazard_penalty_m=-1.0)
    with pytest.raises(SettingsError, match=r"epsilon must be a number in \[0, 1\], got 1\.5"):
        epsilon_greedy(np.zeros(3, dtype=int), 4, 1.5)
