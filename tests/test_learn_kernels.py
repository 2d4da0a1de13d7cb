"""The learners' numba kernels against their plain-Python reference on tiny grids.

The reference (``planner.learn_kernels.reference_episodes`` / ``reference_sweeps``) draws
from the same splitmix64 stream but samples from the model's own outcome arrays
(``model.table()``), not the packed records, so the same bits out also check the packing.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from planner.grid import FREE, DriftInfo, HazardInfo, grid_from_arrays
from planner.learn import corridor_states
from planner.learn_kernels import (
    END_STEP_CAP,
    QLEARNING,
    SARSA,
    Episodes,
    Starts,
    _next,
    rates,
    reference_episodes,
    reference_sweeps,
    run_episodes,
    run_sweeps,
    sampling_inputs,
)
from planner.learn_paths import heuristic_q, model_cost_to_go, sweep_order
from planner.model import Dynamics, build_model
from planner.outcomes import EVENT_BOUNDARY, EVENT_GOAL, EVENT_HAZARD


def pit_yard():
    """3 x 4, a pit between start and goal, king moves, slip 0.2, walls."""
    label = np.full((3, 4), FREE)
    label[1, 1] = 0
    goal = np.zeros((3, 4), dtype=bool)
    goal[1, 3] = True
    grid = grid_from_arrays(label, goal=goal, start=(1, 0), hazards=(HazardInfo("pit", penalty_m=20.0),))
    return build_model(grid, Dynamics(n_actions=8, slip=0.2, edge="wall"))


def gusty_strip():
    """5 x 6, open edges (leaving is an incident), a ditch, a drift band with spread, stalls."""
    label = np.full((5, 6), FREE)
    label[2, 1:4] = 0
    goal = np.zeros((5, 6), dtype=bool)
    goal[4, 2] = True
    drift = DriftInfo("gust", ratio=math.hypot(0.6, 0.4), toward_deg=math.degrees(math.atan2(0.6, -0.4)), spread=0.7,
                      chance=0.8)
    classes = np.zeros((5, 6), np.int32)
    classes[3:] = 1
    grid = grid_from_arrays(label, goal=goal, start=(0, 2), hazards=(HazardInfo("ditch"),), drifts=(drift,),
                            drift_class=classes, drift_members=((), (0,)))
    return build_model(grid, Dynamics(n_actions=8, slip=0.1, stall=0.05))


MODELS = {"pit": pit_yard, "gust": gusty_strip}


def initial_q(model, q_init):
    if q_init == "zeros":  # every row a tie: the greedy draws are exercised from the start
        return np.zeros(model.n_states * model.n_actions)
    return heuristic_q(model, model_cost_to_go(model)).ravel()


EPISODE_CASES = [
    ("pit", SARSA, 0.1, 1.0, 0.5, 0.0, False, "zeros"),
    ("pit", QLEARNING, 0.2, 1.0, 0.5, 0.0, True, "zeros"),
    ("pit", SARSA, 0.1, 0.95, 0.0, 0.8, True, "heuristic"),
    ("gust", QLEARNING, 0.1, 1.0, 0.0, 0.7, False, "heuristic"),
    ("gust", SARSA, 0.3, 0.9, 0.3, 0.0, True, "zeros"),
]


@pytest.mark.parametrize("name, method, eps, gamma, step, decay, explore, q_init", EPISODE_CASES)
def test_episodes_kernel_and_reference_leave_the_same_bits(name, method, eps, gamma, step, decay, explore, q_init):
    model = MODELS[name]()
    n_ep, max_steps = 300, 12
    learning = rates(method, eps, gamma, step_size=step, decay=decay)
    corridor = corridor_states(model) if explore else np.zeros(0, np.int64)
    starts = Starts(int(model.start), corridor, 0.5, max_steps)
    runs = []
    for kernel in (True, False):
        q = initial_q(model, q_init)
        visits = np.zeros(q.size if decay > 0 else 0, np.int64)
        rng = np.array([20261204], np.uint64)
        out = Episodes(np.zeros(n_ep), np.zeros(n_ep, np.int32), np.zeros(n_ep, np.int16))
        if kernel:
            steps = run_episodes(sampling_inputs(model), learning, starts, q, visits, rng, out)
        else:
            steps = reference_episodes(model.table(), model.n_actions, learning, starts, q, visits, rng, out)
        runs.append((q, visits, rng, out, steps))
    (q, visits, rng, out, steps), (q_ref, visits_ref, rng_ref, out_ref, steps_ref) = runs
    assert q.tobytes() == q_ref.tobytes()
    np.testing.assert_array_equal(visits, visits_ref)
    assert int(rng[0]) == int(rng_ref[0]) and steps == steps_ref == int(out.moves.sum())
    for got, expected in zip(out, out_ref, strict=True):
        assert got.tobytes() == expected.tobytes()
    # the runs did learn and did end in more than one way, so the comparison has teeth
    assert not np.array_equal(q, initial_q(model, q_init))
    assert EVENT_GOAL in out.ends and END_STEP_CAP in out.ends
    assert np.any(out.ends >= EVENT_HAZARD) or np.any(out.ends == EVENT_BOUNDARY)


SWEEP_CASES = [
    ("pit", SARSA, 0.1, 1.0, 0.7, 0.0, "zeros"),
    ("pit", QLEARNING, 0.1, 1.0, 0.8, 0.0, "heuristic"),
    ("gust", SARSA, 0.2, 0.95, 0.7, 100.0, "heuristic"),
    ("gust", QLEARNING, 0.1, 1.0, 0.7, 4.0, "zeros"),
]


@pytest.mark.parametrize("name, method, eps, gamma, decay, horizon, q_init", SWEEP_CASES)
def test_sweeps_kernel_and_reference_leave_the_same_bits(name, method, eps, gamma, decay, horizon, q_init):
    model = MODELS[name]()
    order = sweep_order(model, model_cost_to_go(model))
    learning = rates(method, eps, gamma, decay=decay, horizon=horizon)
    q, q_ref = initial_q(model, q_init), initial_q(model, q_init)
    rng, rng_ref = np.array([7], np.uint64), np.array([7], np.uint64)
    # in two calls, as training makes them between checks: sweeps 1-3, then 4-10
    for done, n in ((0, 3), (3, 7)):
        run_sweeps(sampling_inputs(model), learning, order, q, rng, done, n)
        reference_sweeps(model.table(), model.n_actions, learning, order, q_ref, rng_ref, done, n)
        assert q.tobytes() == q_ref.tobytes() and int(rng[0]) == int(rng_ref[0]), (done, n)
    assert not np.array_equal(q, initial_q(model, q_init))


def test_the_kernel_generator_is_splitmix64():
    # First outputs of splitmix64 seeded with 1234567, from Rosetta Code, task
    # "Pseudo-random numbers/Splitmix64" (Vigna's splitmix64.c).
    state, outputs = np.uint64(1234567), []
    for _ in range(3):
        state, z = _next(state)
        outputs.append(int(z))
    assert outputs == [6457827717110365317, 3203168211198807973, 9817491932198370423]
