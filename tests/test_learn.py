"""Learners: SARSA and Q-learning against exact references and a textbook example."""

from __future__ import annotations

import dataclasses
import math
import re

import numpy as np
import pytest
from numpy.testing import assert_allclose

from planner.errors import SettingsError
from planner.exact import on_policy_q, optimal_q
from planner.grid import FREE, DriftInfo, HazardInfo, cost_to_goal, grid_from_arrays
from planner.learn import END_STEP_CAP, LearnSettings, corridor_states, greedy_actions, train
from planner.learn_kernels import (
    QLEARNING,
    SARSA,
    Episodes,
    Starts,
    _greedy,
    _sample,
    rates,
    run_episodes,
    run_sweeps,
    sampling_inputs,
    sampling_table,
)
from planner.learn_paths import fewest_moves, heuristic_q, model_cost_to_go, sweep_order
from planner.model import Dynamics, build_model
from planner.route import nominal_path
from planner.verdict import convergence_report, policy_value


def cliff_grid():
    """Example 6.6 (cliff walking), Sutton & Barto, Reinforcement Learning: An
    Introduction, 2nd ed. (2018): 4 x 12, start bottom-left, goal bottom-right, the
    cliff along the bottom row between them (here a hazard strip ending the run)."""
    label = np.full((4, 12), FREE)
    label[0, 1:11] = 0
    goal = np.zeros((4, 12), dtype=bool)
    goal[0, 11] = True
    return grid_from_arrays(label, goal=goal, start=(0, 0), hazards=(HazardInfo("cliff"),))


def cliff_model():
    return build_model(cliff_grid(), Dynamics(n_actions=4, slip=0.0, edge="wall", step_cost="move",
                                              hazard_penalty_m=100.0))


def cells(model, states):
    return [tuple(int(v) for v in np.unravel_index(s, model.shape)) for s in states]


@pytest.fixture(scope="module")
def cliff():
    return cliff_model()


@pytest.fixture(scope="module")
def cliff_runs(cliff):
    """Both learners as in the book's comparison: epsilon 0.1, step 0.5, Q from zeros."""
    settings = LearnSettings(epsilon=0.1, step_size=0.5, episodes=500, n_seeds=8, q_init="zeros")
    root = np.random.SeedSequence(20180601)
    sarsa_seed, q_seed = root.spawn(2)
    return {"sarsa": train(cliff, "sarsa", settings, seed=sarsa_seed),
            "qlearning": train(cliff, "qlearning", settings, seed=q_seed)}


# ----------------------------------------------------------------------------- cliff walking


def test_cliff_qlearning_consensus_is_the_13_move_route(cliff, cliff_runs):
    path = nominal_path(cliff, greedy_actions(cliff_runs["qlearning"].q_mean))
    # Example 6.6, Sutton & Barto 2nd ed. (2018): Q-learning learns the optimal path along
    # the edge of the cliff: up one, east eleven along row 1, down one = 13 moves.
    assert path.reached_goal and path.n_moves == 13
    assert cells(cliff, path.states) == [(0, 0)] + [(1, c) for c in range(12)]


def test_cliff_sarsa_consensus_keeps_off_the_edge_row(cliff, cliff_runs):
    path = nominal_path(cliff, greedy_actions(cliff_runs["sarsa"].q_mean))
    assert path.reached_goal
    # Example 6.6, Sutton & Barto 2nd ed. (2018): SARSA learns the longer, safer path.
    # Precisely: row 1 (next to the strip) is entered only in columns 0 and 11.
    assert {c for r, c in cells(cliff, path.states) if r == 1} <= {0, 11}
    assert path.n_moves > 13


def test_cliff_sarsa_online_return_beats_qlearning(cliff, cliff_runs):
    later = slice(100, 500)  # episodes 101-500, after the early learning
    sarsa = cliff_runs["sarsa"].returns[:, later].mean()
    qlearning = cliff_runs["qlearning"].returns[:, later].mean()
    # Sutton & Barto 2nd ed. (2018), Example 6.6 and its figure (from memory): with
    # epsilon-greedy exploration, SARSA's online return per episode is higher than
    # Q-learning's, which keeps falling off while walking the edge.
    assert sarsa > qlearning + 5.0
    # Cross-check with the exact value: walking the optimal route with noise 0.1 is
    # worth the exact policy value below; Q-learning's online mean should sit near it.
    exact, _, _ = policy_value(cliff, greedy_actions(optimal_q(cliff).q), 0.1)
    assert_allclose(qlearning, exact, atol=3.0)  # about 4 standard errors over 3200 episodes


def test_cliff_episode_records(cliff, cliff_runs):
    run = cliff_runs["qlearning"]
    assert run.returns.shape == run.moves.shape == run.ends.shape == (8, 500)
    assert run.returns.dtype == np.float64 and run.moves.dtype == np.int32 and run.ends.dtype == np.int16
    assert set(np.unique(run.ends)) <= {1, 3, END_STEP_CAP}
    # A finished episode's return is minus its moves, minus 100 when it fell off.
    assert_allclose(run.returns, -run.moves - 100.0 * (run.ends == 3), atol=1e-9)
    assert run.steps_total == int(run.moves.sum())
    # Fewest moves 13 (the book's optimal path), so the derived cap is 10 x 13.
    assert fewest_moves(cliff) == 13 and run.max_steps == 130


# ----------------------------------------------------------------------------- convergence


def small_yard():
    """A 3 x 4 grid with a pit between start and goal, king moves, slip 0.2, walls.

    Every visited state's best action beats the next-best by at least 0.28 in both
    references (near-ties would need far more episodes to resolve).
    """
    label = np.full((3, 4), FREE)
    label[1, 1] = 0
    goal = np.zeros((3, 4), dtype=bool)
    goal[1, 3] = True
    grid = grid_from_arrays(label, goal=goal, start=(1, 0), hazards=(HazardInfo("pit", penalty_m=20.0),))
    return build_model(grid, Dynamics(n_actions=8, slip=0.2, edge="wall"))


@pytest.mark.parametrize("method", ["sarsa", "qlearning"])
def test_learners_converge_to_exact_references(method):
    model = small_yard()
    settings = LearnSettings(epsilon=0.1, step_decay=0.8, episodes=20_000, start_mode="explore")
    learned = train(model, method, settings, seed=7)
    reference = on_policy_q(model, 0.1) if method == "sarsa" else optimal_q(model)
    report = convergence_report(model, learned, reference, 0.1)
    assert_allclose(report.agreement, 1.0, atol=1e-12)
    assert report.converged and report.seeds_agreeing == 8
    assert_allclose(report.value_gap_m, 0.0, atol=1e-6)


# ----------------------------------------------------------------------------- determinism


def test_same_seed_same_arrays_whatever_the_thread_count():
    model = small_yard()
    for method in ("sarsa", "qlearning"):
        for settings in (LearnSettings(episodes=300, n_seeds=5),
                         LearnSettings(episodes=300, n_seeds=5, step_decay=0.7, start_mode="explore", q_init="zeros")):
            runs = [train(model, method, settings, seed=np.random.SeedSequence(99), n_jobs=jobs) for jobs in (1, 2, 3)]
            runs.append(train(model, method, settings, seed=99, n_jobs=2))
            for other in runs[1:]:
                for name in ("q", "returns", "moves", "ends"):
                    np.testing.assert_array_equal(getattr(runs[0], name), getattr(other, name))
            assert runs[0].seed_entropy == 99
            different = train(model, method, settings, seed=100)
            assert not np.array_equal(different.returns, runs[0].returns)


def test_progress_reports_and_chunking_does_not_change_results(monkeypatch):
    model = small_yard()
    settings = LearnSettings(episodes=200, n_seeds=3, step_decay=0.9, start_mode="explore")
    calls = []
    chunked = train(model, "sarsa", settings, seed=5, progress=lambda done, total: calls.append((done, total)))
    assert calls[-1] == (600, 600)
    assert all(a[0] <= b[0] for a, b in zip(calls, calls[1:], strict=False))
    monkeypatch.setattr("planner.learn.PROGRESS_CHUNKS", 1)
    whole = train(model, "sarsa", settings, seed=5)
    for name in ("q", "returns", "moves", "ends"):
        np.testing.assert_array_equal(getattr(chunked, name), getattr(whole, name))


# ----------------------------------------------------------------------------- pieces


def test_sampled_outcomes_follow_the_model():
    # From the start, north leads into the goal; slip 0.2 turns it east or west (0.1
    # each, four moves) into two different hazards. Q is held fixed (step size 0) with
    # north greedy, so every episode is one move and its end is one draw of the sampler.
    label = np.array([[0, FREE, 1], [FREE, FREE, FREE]])
    goal = np.array([[False, False, False], [False, True, False]])
    grid = grid_from_arrays(label, goal=goal, start=(0, 1), hazards=(HazardInfo("west"), HazardInfo("east")))
    model = build_model(grid, Dynamics(n_actions=4, slip=0.2, edge="wall", hazard_penalty_m=50.0))
    n = 40_000
    q = np.full(model.n_states * 4, -1.0)
    q[model.start * 4 + 0] = 0.0
    returns, moves, ends = np.zeros(n), np.zeros(n, np.int32), np.zeros(n, np.int16)
    run_episodes(sampling_inputs(model), rates(QLEARNING, 0.0, 1.0, step_size=0.0),
                 Starts(int(model.start), np.zeros(0, np.int64), 0.5, 10), q, np.zeros(0, np.int64),
                 np.array([3], np.uint64), Episodes(returns, moves, ends))
    share = np.array([(ends == code).mean() for code in (1, 3, 4)])
    # Binomial: 40,000 draws; 5 standard errors of a share of 0.1 is 0.0075.
    assert_allclose(share, [0.8, 0.1, 0.1], atol=0.0075)
    assert np.all(moves == 1)
    assert_allclose(returns, np.where(ends == 1, -1.0, -51.0))


def test_sampler_walk_matches_block_probabilities():
    # A block with many outcomes: king moves, slip, and a spread drift.
    label = np.full((9, 9), FREE)
    goal = np.zeros((9, 9), dtype=bool)
    goal[8, 8] = True
    drift = DriftInfo("gust", ratio=math.hypot(0.6, 0.4), toward_deg=math.degrees(math.atan2(0.6, -0.4)), spread=0.7,
                      chance=0.8)
    grid = grid_from_arrays(label, goal=goal, start=(4, 4), drifts=(drift,), drift_class=np.ones((9, 9), np.int32),
                            drift_members=((), (0,)))
    model = build_model(grid, Dynamics(n_actions=8, slip=0.2, edge="wall"))
    table = sampling_table(model)
    k = model.start * 8 + 1
    lo, hi = int(model.offsets[k]), int(model.offsets[k + 1])
    assert hi - lo >= 10
    # Evenly spaced 32-bit draws: each outcome's share is its probability within 2 / n.
    n = 2**16
    picks = np.array([_sample(table, lo, hi - 1, np.uint32(d)) for d in range(0, 2**32, 2**32 // n)])
    share = np.bincount(picks - lo, minlength=hi - lo) / n
    assert_allclose(share, model.prob[lo:hi], atol=2.0 / n)
    assert picks.min() >= lo and picks.max() <= hi - 1
    # The largest draw still lands in the block, on its last outcome.
    assert _sample(table, lo, hi - 1, np.uint32(2**32 - 1)) == hi - 1


def test_kernel_breaks_ties_uniformly():
    q = np.array([0.0, 2.0, 1.0, 2.0, -1.0, 0.5, 2.0, 1.9])
    state = np.uint64(12345)
    picks = np.zeros(8, dtype=np.int64)
    for _ in range(30_000):
        state, a, best = _greedy(q, 0, 8, np.uint64(state))
        picks[a] += 1
    assert best == 2.0
    assert picks[[0, 2, 4, 5, 7]].sum() == 0
    # Each of the three tied actions: share 1/3, standard error 0.0027 over 30,000 draws.
    assert_allclose(picks[[1, 3, 6]] / 30_000, 1 / 3, atol=0.012)


def test_greedy_actions_ties():
    q = np.array([[1.0, 3.0, 3.0, 0.0], [2.0, 2.0, 2.0, 2.0]])
    np.testing.assert_array_equal(greedy_actions(q), [1, 0])
    rng = np.random.default_rng(5)
    draws = np.array([greedy_actions(q, rng) for _ in range(4000)])
    assert set(np.unique(draws[:, 0])) == {1, 2}
    assert_allclose(np.bincount(draws[:, 1], minlength=4) / 4000, 0.25, atol=0.03)


def test_heuristic_is_exact_on_a_deterministic_grid(cliff):
    # With no slip or drift, one exact step plus the exact cost to go is Q* itself.
    grid_cost = cost_to_goal(cliff_grid(), 4, unit_cost=True)
    assert_allclose(model_cost_to_go(cliff), grid_cost.ravel(), atol=0)
    assert_allclose(heuristic_q(cliff, grid_cost), optimal_q(cliff).q, atol=1e-9)


def test_heuristic_values_unreachable_cells_at_the_boundary_penalty():
    label = np.array([[FREE, FREE, 0, FREE, FREE]])
    goal = np.array([[False, False, False, False, True]])
    grid = grid_from_arrays(label, goal=goal, start=(0, 0), hazards=(HazardInfo("ditch", penalty_m=30.0),))
    model = build_model(grid, Dynamics(n_actions=4, slip=0.0, edge="wall", step_cost="move", hazard_penalty_m=75.0))
    q = heuristic_q(model, model_cost_to_go(model))
    east = 1
    assert model.boundary_penalty_m == 75.0
    assert_allclose(q[0, east], -1.0 - 75.0)                         # into cell 1, cut off from the goal
    assert_allclose(q[1, east], -1.0 - 30.0)                         # into the ditch: reward only
    assert_allclose(q[3, east], -1.0)                                # into the goal
    assert_allclose(q[2], 0.0)                                       # the ditch is inactive


def test_corridor_of_exploring_starts(cliff):
    # Cliff grid, cost 1 per move: a cell (r, c) above the strip is r + c from the start
    # and r + 11 - c from the goal, 2r + 11 in all, against 13 from the start. A margin
    # of 0.2 allows 15.6: rows 1 and 2 qualify, row 3 (2 * 3 + 11 = 17) does not.
    states = corridor_states(cliff, margin=0.2)
    expected = sorted([0] + [r * 12 + c for r in (1, 2) for c in range(12)])
    np.testing.assert_array_equal(states, expected)


def test_step_cap_ends_episodes(cliff):
    learned = train(cliff, "sarsa", LearnSettings(episodes=20, n_seeds=2, max_steps=1, q_init="zeros"), seed=1)
    assert np.all(learned.moves == 1)
    assert set(np.unique(learned.ends)) <= {END_STEP_CAP, 3}


# ----------------------------------------------------------------------------- validation


@pytest.mark.parametrize("field, value", [
    ("epsilon", -0.1), ("epsilon", 1.5), ("epsilon", float("nan")), ("step_size", 0.0), ("step_size", 1.2),
    ("step_decay", 0.5), ("step_decay", 1.1), ("gamma", 0.0), ("gamma", 1.01), ("episodes", 0),
    ("episodes", 10.0), ("episodes", True), ("max_steps", 0), ("n_seeds", 0), ("start_mode", "random"),
    ("q_init", "ones"),
])
def test_settings_name_the_setting(field, value):
    # a library user is told the field to change, not a command-line option
    with pytest.raises(SettingsError, match=rf"^LearnSettings\.{field} must be .*, got {re.escape(repr(value))}$"):
        LearnSettings(**{field: value})


def test_train_refuses_unknown_method_and_jobs(cliff):
    with pytest.raises(SettingsError, match="method"):
        train(cliff, "montecarlo", LearnSettings(episodes=1, n_seeds=1))
    with pytest.raises(SettingsError, match="n_jobs must be a whole number >= 1, got 0"):
        train(cliff, "sarsa", LearnSettings(episodes=1, n_seeds=1), n_jobs=0)
    with pytest.raises(SettingsError, match=r"seed must be a whole number in \[0, 2\*\*128\), got -3"):
        train(cliff, "sarsa", LearnSettings(episodes=1, n_seeds=1), seed=-3)


# ----------------------------------------------------------------------------- sweeps schedule


SWEEPS = LearnSettings(epsilon=0.1, n_seeds=4, schedule="sweeps", max_sweeps=4096)


def test_sweeps_qlearning_reaches_the_optimum_on_the_cliff(cliff):
    # Example 6.6, Sutton & Barto 2nd ed. (2018): the optimum walks the cliff edge in 13
    # moves. Deterministic moves, so synchronous Q-learning's fixed point is Q* itself.
    result = train(cliff, "qlearning", dataclasses.replace(SWEEPS, max_sweeps=256), seed=3)
    exact = optimal_q(cliff)
    act = cliff.active
    assert_allclose(result.q_mean[act], exact.q[act], atol=1e-6)
    path = nominal_path(cliff, np.argmax(result.q_mean, axis=1))
    assert path.reached_goal and path.n_moves == 13
    assert result.n_sweeps == 256 and not result.stopped_by_rule
    assert result.steps_total == 256 * sweep_order(cliff, model_cost_to_go(cliff)).size * 4


def test_sweeps_qlearning_averages_a_stochastic_corridor():
    # A corridor of 6 cells where each move stalls with probability 0.25: the expected
    # number of moves from the west end is 5 / 0.75 (geometric trials per cell).
    from test_exact import corridor_model

    model = corridor_model(6, stall=0.25)
    result = train(model, "qlearning", dataclasses.replace(SWEEPS, n_seeds=8), seed=11)
    east = 1
    assert_allclose(result.q_mean[model.start, east], -5 / 0.75, rtol=0.01)


def test_sweeps_sarsa_approaches_the_epsilon_greedy_fixed_point_on_the_cliff(cliff):
    # Example 6.6: the on-policy solution at epsilon 0.1 keeps off the cliff edge. SARSA's
    # sampled next action keeps its targets noisy; with 4,096 sweeps and 4 seeds the start's
    # value is within a move of the exact fixed point and the route keeps off the edge row.
    result = train(cliff, "sarsa", SWEEPS, seed=5)
    exact = on_policy_q(cliff, 0.1)
    assert abs(result.q_mean[cliff.start].max() - exact.q[cliff.start].max()) < 1.0
    route = nominal_path(cliff, np.argmax(result.q_mean, axis=1))
    assert route.reached_goal
    assert all(r >= 2 for r, _ in cells(cliff, route.states)[2:-2])


def test_sweeps_same_seed_same_arrays_whatever_the_thread_count(cliff):
    settings = dataclasses.replace(SWEEPS, max_sweeps=64)
    one = train(cliff, "sarsa", settings, seed=8, n_jobs=1)
    two = train(cliff, "sarsa", settings, seed=8, n_jobs=2)
    np.testing.assert_array_equal(one.q, two.q)
    np.testing.assert_array_equal(one.check_value, two.check_value)
    other = train(cliff, "sarsa", settings, seed=9, n_jobs=2)
    assert not np.array_equal(one.q, other.q)


def test_sweeps_stop_at_the_first_check_the_rule_passes(cliff):
    calls = []

    def rule(mean, q):
        calls.append(q.copy())
        return len(calls) == 3, 0.5 / len(calls)

    result = train(cliff, "qlearning", SWEEPS, seed=2, stop_rule=rule)
    # Checks after 4, 8 and 16 sweeps; the third passes.
    assert result.n_sweeps == 16 and result.stopped_by_rule
    assert_allclose(result.check_p_incident, [0.5, 0.25, 0.5 / 3])
    n_pairs = sweep_order(cliff, model_cost_to_go(cliff)).size
    assert result.check_updates.tolist() == [4 * n_pairs * 4, 8 * n_pairs * 4, 16 * n_pairs * 4]
    assert result.check_value.shape == (4, 3)
    np.testing.assert_array_equal(calls[-1], result.q)


def test_sweep_order_puts_the_goal_side_first(cliff):
    order = sweep_order(cliff, model_cost_to_go(cliff))
    states = order[:: cliff.n_actions] // cliff.n_actions
    cost = model_cost_to_go(cliff)[states]
    assert np.all(np.diff(cost) >= 0)
    assert set(states) == set(np.flatnonzero(cliff.active & ~cliff.goal & np.isfinite(model_cost_to_go(cliff))))


def test_sweep_step_with_a_horizon_is_rescaled_linear():
    # One pair (east from the west cell of a two-cell corridor) whose only outcome ends the
    # run at the goal with reward -1. Sweeps 2 and 3 from Q = 0 with H = 4 take steps
    # 4 / (4 + 1) and 4 / (4 + 2), worked by hand: Q = -0.8, then -0.8 + (2/3)(-1 + 0.8).
    from test_exact import corridor_model

    model = corridor_model(2)
    east = 1
    order = np.array([model.start * model.n_actions + east], np.int64)
    q = np.zeros(model.n_states * model.n_actions)
    sampling, learning = sampling_inputs(model), rates(SARSA, 0.1, 1.0, decay=0.7, horizon=4.0)
    run_sweeps(sampling, learning, order, q, np.array([1], np.uint64), 1, 1)
    assert_allclose(q[order[0]], -0.8, rtol=1e-15)
    run_sweeps(sampling, learning, order, q, np.array([1], np.uint64), 2, 1)
    assert_allclose(q[order[0]], -0.8 - 0.2 * 2 / 3, rtol=1e-15)


def slippery_cliff():
    """The cliff of Example 6.6 (Sutton & Barto 2nd ed., 2018), 6 rows high, with slip 0.1."""
    label = np.full((6, 12), FREE)
    label[0, 1:11] = 0
    goal = np.zeros((6, 12), dtype=bool)
    goal[0, 11] = True
    grid = grid_from_arrays(label, goal=goal, start=(0, 0), hazards=(HazardInfo("cliff"),))
    return build_model(grid, Dynamics(n_actions=4, slip=0.1, edge="wall", step_cost="move", hazard_penalty_m=100.0))


def test_sweeps_sarsa_with_a_horizon_meets_the_risk_verdict_on_a_slippery_cliff():
    # The exact on-policy fixed point (value iteration, planner.exact) is the reference;
    # SARSA in sweeps, the next action drawn from its epsilon-greedy policy, must end with
    # a policy whose exact P(incident) and expected length agree with it (the plan's rule).
    from planner.learn import SARSA_SWEEP_HORIZON
    from planner.ties import equally_good, safest_among
    from planner.verdict import risk_verdict

    model = slippery_cliff()
    eps = 0.1
    exact = on_policy_q(model, eps)
    reference = safest_among(model, equally_good(exact.q), eps, value=exact.q)

    def delivered(q):
        from planner.learn import learned_ties as ties

        return safest_among(model, ties(q, 0.01, max_slack_m=0.05), eps, value=q.mean(axis=0), riskiest=False).greedy

    def rule(_mean, q):
        verdict = risk_verdict(model, delivered(q), reference)
        return verdict.converged, verdict.p_incident

    settings = LearnSettings(epsilon=eps, n_seeds=4, schedule="sweeps", max_sweeps=4096,
                             sweep_horizon=SARSA_SWEEP_HORIZON)
    result = train(model, "sarsa", settings, seed=21, stop_rule=rule)
    assert result.stopped_by_rule and result.n_sweeps < 4096
    final = risk_verdict(model, delivered(result.q), reference)
    assert final.converged
    assert_allclose(final.p_incident, reference.p_incident, rtol=0.1)
    assert result.check_p_incident[-1] == final.p_incident


@pytest.mark.parametrize("horizon", [None, 100.0])
def test_sweeps_sarsa_same_seed_same_arrays_whatever_the_thread_count(horizon):
    model = slippery_cliff()
    settings = LearnSettings(epsilon=0.1, n_seeds=3, schedule="sweeps", max_sweeps=40, sweep_horizon=horizon)
    one = train(model, "sarsa", settings, seed=8, n_jobs=1)
    two = train(model, "sarsa", settings, seed=8, n_jobs=2)
    again = train(model, "sarsa", settings, seed=8, n_jobs=3)
    for other in (two, again):
        np.testing.assert_array_equal(one.q, other.q)
        np.testing.assert_array_equal(one.check_value, other.check_value)
        np.testing.assert_array_equal(one.check_updates, other.check_updates)
    assert not np.array_equal(one.q, train(model, "sarsa", settings, seed=9, n_jobs=2).q)


def test_sweep_horizon_is_checked():
    with pytest.raises(SettingsError, match="sweep_horizon"):
        LearnSettings(sweep_horizon=0.5)
    with pytest.raises(SettingsError, match="sweep_horizon"):
        LearnSettings(sweep_horizon=math.inf)
