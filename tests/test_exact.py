"""Exact references: value iteration against closed forms and textbook worked examples."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from numpy.testing import assert_allclose

from planner.errors import SettingsError, SolverError
from planner.exact import ExactSolution, near_best, on_policy_q, optimal_q
from planner.grid import FREE, OUTSIDE, DriftInfo, HazardInfo, grid_from_arrays
from planner.learn import Learned, LearnSettings, greedy_actions
from planner.model import EVENT_GOAL, EVENT_NONE, Dynamics, build_model
from planner.motion import moves_for
from planner.route import nominal_path
from planner.verdict import convergence_report, occupancy, policy_value

#: Unit-cost moves, no slip, walls at the edge: the textbook gridworld dynamics.
BOOK = dict(slip=0.0, edge="wall", step_cost="move")

# ----------------------------------------------------------------------------- fixtures

#: Wind strength per column, Sutton & Barto, Reinforcement Learning: An Introduction,
#: 2nd ed. (2018), Example 6.5 (windy gridworld), Figure in the example.
WIND = np.array([0, 0, 0, 1, 1, 1, 2, 2, 1, 0])
WINDY_ROWS, WINDY_COLS = 7, 10
#: The book's start and goal sit in the fourth row from the top of seven, which is the
#: middle row counted from the south too (row 3); start column 0, goal column 7.
WINDY_START, WINDY_GOAL = (3, 0), (3, 7)


def windy_model(n_actions: int):
    """Example 6.5 as a veerwise model: one drift zone per wind strength, pushing north.

    The wind of the column a move starts in acts on that move (the drift of the start
    cell), with no spread and chance 1; the edges are walls.
    """
    label = np.full((WINDY_ROWS, WINDY_COLS), FREE)
    goal = np.zeros_like(label, dtype=bool)
    goal[WINDY_GOAL] = True
    drift_class = np.broadcast_to(WIND, label.shape).astype(np.int32)
    drifts = (DriftInfo("wind 1", ratio=1.0), DriftInfo("wind 2", ratio=2.0))
    grid = grid_from_arrays(label, goal=goal, start=WINDY_START, drifts=drifts, drift_class=drift_class,
                            drift_members=((), (0,), (1,)))
    return build_model(grid, Dynamics(n_actions=n_actions, **BOOK))


def landing_only_goal(model):
    """The same model with the book's rule that only landing on the goal ends an episode.

    Our model ends a run at the first goal cell the swept path crosses; in the book the
    wind can carry the agent across the goal without ending the episode. Each goal
    outcome whose landing cell (start + move + wind, clamped to the grid) is not the
    goal becomes an ordinary move to that landing cell. The landing cells of the other
    outcomes are checked to agree with the model.
    """
    n_a = model.n_actions
    moves = moves_for(n_a)
    counts = np.diff(model.offsets)
    pair = np.repeat(np.arange(model.n_states * n_a), counts)
    row, col = np.divmod(pair // n_a, WINDY_COLS)
    act = pair % n_a
    land_row = np.clip(row + moves[act, 0] + WIND[col], 0, WINDY_ROWS - 1)
    land_col = np.clip(col + moves[act, 1], 0, WINDY_COLS - 1)
    landing = (land_row * WINDY_COLS + land_col).astype(np.int32)
    going = model.event == EVENT_NONE
    np.testing.assert_array_equal(model.next_state[going], landing[going])
    goal_index = WINDY_GOAL[0] * WINDY_COLS + WINDY_GOAL[1]
    crossed_only = (model.event == EVENT_GOAL) & (landing != goal_index)
    return dataclasses.replace(
        model, event=np.where(crossed_only, EVENT_NONE, model.event).astype(np.int16),
        next_state=np.where(crossed_only, landing, model.next_state).astype(np.int32),
    )


def cliff_model():
    """Example 6.6 (cliff walking), Sutton & Barto 2nd ed. (2018): 4 x 12, start bottom-left,
    goal bottom-right, the cliff between them along the bottom row. Here the cliff is a
    hazard strip that ends the run with penalty 100; every move costs 1."""
    label = np.full((4, 12), FREE)
    label[0, 1:11] = 0
    goal = np.zeros((4, 12), dtype=bool)
    goal[0, 11] = True
    grid = grid_from_arrays(label, goal=goal, start=(0, 0), hazards=(HazardInfo("cliff"),))
    return build_model(grid, Dynamics(n_actions=4, hazard_penalty_m=100.0, **BOOK))


def corridor_model(length: int, *, stall: float = 0.0):
    """A 1 x ``length`` corridor, start at the west end, goal at the east end."""
    label = np.full((1, length), FREE)
    goal = np.zeros((1, length), dtype=bool)
    goal[0, -1] = True
    grid = grid_from_arrays(label, goal=goal, start=(0, 0))
    return build_model(grid, Dynamics(n_actions=4, slip=0.0, stall=stall, edge="wall", step_cost="move"))


def cells(model, states):
    return [tuple(int(v) for v in np.unravel_index(s, model.shape)) for s in states]


# ----------------------------------------------------------------------------- windy gridworld


@pytest.mark.parametrize("n_actions, moves", [(4, 15), (8, 7)])
def test_windy_gridworld_optimal_episode_length(n_actions, moves):
    model = landing_only_goal(windy_model(n_actions))
    solution = optimal_q(model)
    # Sutton & Barto, RL: An Introduction, 2nd ed. (2018), Example 6.5: the shortest
    # episode takes 15 moves with the four moves (from memory: "two more than the
    # minimum of 15"); with king's moves, Exercise 6.9, 7 moves (from memory: the
    # commonly reported answer to the exercise). Each move costs 1, so V*(start) = -moves.
    assert_allclose(solution.v[model.start], -moves, atol=1e-9)
    path = nominal_path(model, greedy_actions(solution.q))
    assert path.reached_goal
    assert path.n_moves == moves
    assert solution.converged and solution.residual <= 1e-9


def test_windy_swept_goal_is_never_longer_than_landing_only():
    # Our swept path may also end a run by crossing the goal, which can only shorten it.
    for n_actions, book_moves in ((4, 15), (8, 7)):
        swept = optimal_q(windy_model(n_actions))
        model = windy_model(n_actions)
        assert -swept.v[model.start] <= book_moves
        assert nominal_path(model, greedy_actions(swept.q)).reached_goal


# ----------------------------------------------------------------------------- cliff walking


def test_cliff_optimum_is_the_13_move_edge_route():
    model = cliff_model()
    solution = optimal_q(model)
    # Example 6.6, Sutton & Barto 2nd ed. (2018): the optimal path runs along the edge of
    # the cliff: one move up, eleven east along the row next to it, one down = 13 moves.
    assert_allclose(solution.v[model.start], -13.0, atol=1e-9)
    path = nominal_path(model, greedy_actions(solution.q))
    assert path.reached_goal and path.n_moves == 13
    assert cells(model, path.states) == [(0, 0)] + [(1, c) for c in range(12)]


def test_cliff_epsilon_greedy_fixed_point_keeps_off_the_edge_row():
    model = cliff_model()
    solution = on_policy_q(model, 0.1)
    path = nominal_path(model, greedy_actions(solution.q))
    assert path.reached_goal
    # Example 6.6, Sutton & Barto 2nd ed. (2018): under epsilon-greedy action selection
    # (epsilon 0.1) the on-policy solution takes the safer path, away from the cliff.
    # Asserted precisely: the route enters the row next to the strip (row 1) only in the
    # start's column and the goal's column, never above the strip itself (columns 1-10).
    edge_columns = {c for r, c in cells(model, path.states) if r == 1}
    assert edge_columns <= {0, 11}
    assert solution.v[model.start] < -13.0


# ----------------------------------------------------------------------------- closed forms


def test_stall_corridor_expected_cost_is_geometric():
    stall = 0.25
    model = corridor_model(6, stall=stall)
    solution = optimal_q(model)
    # Each move succeeds with probability 1 - stall, independently: the number of moves
    # to cover 5 cells is a sum of 5 geometric variables with mean 1 / (1 - stall).
    expected = -np.arange(5, 0, -1) / (1.0 - stall)
    assert_allclose(solution.v[:5], expected, rtol=0, atol=1e-8)
    assert solution.iterations >= 1


@pytest.mark.parametrize("epsilon, gamma", [(0.1, 1.0), (0.3, 1.0), (0.2, 0.9)])
def test_on_policy_fixed_point_two_cell_corridor(epsilon, gamma):
    model = corridor_model(2)
    solution = on_policy_q(model, epsilon, gamma=gamma)
    # East ends the run (reward -1); north, south (walls) and west (wall) stay put.
    # Greedy is east, so V = (1 - eps)(-1) + eps/4 (-1 + 3(-1 + gamma V)), which solves to
    # V = -1 / (1 - 3 eps gamma / 4).
    v = -1.0 / (1.0 - 3.0 * epsilon * gamma / 4.0)
    assert_allclose(solution.v[model.start], v, rtol=1e-9)
    assert_allclose(solution.q[model.start], [-1.0 + gamma * v, -1.0, -1.0 + gamma * v, -1.0 + gamma * v],
                    rtol=1e-9)


def test_trapped_pocket_is_minus_infinity_and_isolated():
    label = np.full((3, 5), FREE)
    label[:, 3] = OUTSIDE
    label[0, 4] = label[2, 4] = OUTSIDE  # cell (1, 4) is a pocket walled in by the boundary
    goal = np.zeros((3, 5), dtype=bool)
    goal[1, 2] = True
    grid = grid_from_arrays(label, goal=goal, start=(1, 0))
    model = build_model(grid, Dynamics(n_actions=4, **BOOK))
    solution = optimal_q(model)
    pocket = 1 * 5 + 4
    assert np.isneginf(solution.v[pocket])
    assert_allclose(solution.v[model.start], -2.0, atol=1e-9)
    eps = on_policy_q(model, 0.1)
    assert np.isneginf(eps.v[pocket]) and np.isfinite(eps.v[model.start])


def test_not_converging_raises_with_the_residual():
    model = corridor_model(6, stall=0.5)
    with pytest.raises(SolverError, match="residual"):
        optimal_q(model, max_iter=1)


@pytest.mark.parametrize("kwargs, fragment", [
    (dict(gamma=0.0), "^gamma must be"), (dict(gamma=1.5), "^gamma must be"), (dict(tol=0.0), "tol"), (dict(max_iter=0), "max_iter"),
])
def test_solver_settings_are_checked(kwargs, fragment):
    with pytest.raises(SettingsError, match=fragment):
        optimal_q(corridor_model(3), **kwargs)
    with pytest.raises(SettingsError, match=r"^epsilon must be a number in \[0, 1\], got 1\.5"):
        on_policy_q(corridor_model(3), 1.5)


# ----------------------------------------------------------------------------- convergence report


def fake_learned(model, q, n_seeds=3, episodes=100):
    """A Learned holding given Q tables (every seed the same), for report tests."""
    q_all = np.repeat(np.asarray(q, dtype=float)[None], n_seeds, axis=0)
    zeros = np.zeros((n_seeds, episodes))
    return Learned(method="sarsa", settings=LearnSettings(episodes=episodes, n_seeds=n_seeds), q=q_all,
                   q_mean=q_all.mean(axis=0), returns=zeros, moves=zeros.astype(np.int32),
                   ends=zeros.astype(np.int16), max_steps=100, seed_entropy=0, seed_spawn_key=(),
                   steps_total=0, seconds=0.0)


def test_occupancy_of_two_cell_corridor_is_geometric():
    model = corridor_model(2)
    eps = 0.1
    value, chain, finite = policy_value(model, np.array([1, 0]), eps)
    x = occupancy(model, chain, finite)
    # Staying put has probability 3 eps / 4 per move: expected visits 1 / (1 - 3 eps / 4).
    assert_allclose(x[model.start], 1.0 / (1.0 - 0.75 * eps), rtol=1e-9)
    assert_allclose(value, -1.0 / (1.0 - 0.75 * eps), rtol=1e-9)


def test_report_on_the_exact_answer_is_converged():
    model = cliff_model()
    reference = on_policy_q(model, 0.1)
    report = convergence_report(model, fake_learned(model, reference.q), reference, 0.1)
    assert_allclose(report.agreement, 1.0, atol=1e-12)
    assert_allclose(report.value_gap_m, 0.0, atol=1e-8)
    assert report.converged and report.seed_routes_matching == 3 and report.seeds_agreeing == 3
    assert report.message.startswith("converged: 100% agreement")


def test_report_on_a_wrong_policy_says_not_converged():
    model = corridor_model(2)
    eps = 0.1
    reference = on_policy_q(model, eps)
    wrong = np.zeros((model.n_states, model.n_actions))
    wrong[model.start, 3] = 1.0  # always west, into the wall
    report = convergence_report(model, fake_learned(model, wrong, episodes=300), reference, eps)
    # Greedy west leaves only through a random east move (eps / 4 per move): V = -4 / eps.
    assert_allclose(report.learned_value_m, -4.0 / eps, rtol=1e-9)
    assert_allclose(report.value_gap_m, reference.v[model.start] + 4.0 / eps, rtol=1e-9)
    assert_allclose(report.agreement, 0.0, atol=1e-12)
    assert not report.converged
    assert report.message == ("not converged: only 0% agreement with the exact solution on visited states; "
                              "try --episodes 1200")


def test_report_flags_a_policy_that_can_loop_forever():
    model = corridor_model(3)
    reference = optimal_q(model)
    wrong = np.zeros((model.n_states, model.n_actions))
    wrong[:, 3] = 1.0  # west everywhere: with no noise the run never ends
    report = convergence_report(model, fake_learned(model, wrong), reference, 0.0)
    assert report.value_gap_m == np.inf and not report.converged
    assert "loop forever" in report.message


def test_near_best_counts_ties():
    q = np.array([[-1.0, -1.0 - 1e-9, -2.0], [-5.0, -4.0, -4.0]])
    np.testing.assert_array_equal(near_best(q), [[True, True, False], [False, True, True]])


def test_exact_solution_is_frozen():
    solution = optimal_q(corridor_model(3))
    assert isinstance(solution, ExactSolution)
    with pytest.raises(dataclasses.FrozenInstanceError):
        solution.iterations = 0
