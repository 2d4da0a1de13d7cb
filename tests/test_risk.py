"""The risk table: absorbing-chain figures against closed forms, a textbook, gymnasium and Monte Carlo."""

from __future__ import annotations

import csv
import io
import json
import math

import numpy as np
import pytest
from conftest import text_map_grid
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from planner.errors import SettingsError
from planner.exact import on_policy_q, optimal_q
from planner.grid import FREE, DriftInfo, GridSpec, HazardInfo, grid_from_arrays, rasterise
from planner.learn import greedy_actions
from planner.model import EVENT_GOAL, EVENT_HAZARD, Dynamics, build_model, epsilon_greedy
from planner.risk import (
    Z95,
    McEstimate,
    RiskRow,
    absorption,
    evaluate,
    exact_interval,
    format_prob,
    mc_estimate,
    risk_map,
    sample_runs,
    sensitivity,
)
from planner.risk_table import format_table
from planner.route import clearance_m
from planner.site import site_from_geojson

EAST, WEST = 1, 3  # 4-move action indices (N, E, S, W)


# ----------------------------------------------------------------------------- corridors
#
# A 1 x (a + 1) corridor: column 0 is a hazard (or a trap, or a zone that does not end
# the run), column a the goal, edges are walls, 4 moves, no slip. The policy always
# commands east. A drift zone over the whole corridor pushes two cells west with
# probability q ("chance"), so a move lands one cell east with probability p = 1 - q
# and one cell west with probability q: exactly the gambler's-ruin walk on 0..a with
# no stay-put steps (the swept path of a one-cell move crosses only the landing cell).


def corridor(a: int, start: int, *, west_chance: float = 0.0, first: str = "hazard"):
    """Grid and model of the corridor; ``first`` is what column 0 is."""
    label = np.full((1, a + 1), FREE)
    hazards = ()
    if first in ("hazard", "zone"):
        label[0, 0] = 0
        hazards = (HazardInfo("Drop", ends_run=(first == "hazard")),)
    goal = np.zeros(label.shape, dtype=bool)
    goal[0, a] = True
    drifts, drift_class, members = (), None, ((),)
    if west_chance > 0:
        drifts = (DriftInfo("West gust", ratio=2.0, toward_deg=270.0, chance=west_chance),)
        drift_class = np.ones(label.shape, dtype=np.int32)
        members = ((), (0,))
    grid = grid_from_arrays(label, goal=goal, start=(0, start), cell_m=1.0, hazards=hazards, drifts=drifts,
                            drift_class=drift_class, drift_members=members)
    model = build_model(grid, Dynamics(n_actions=4, slip=0.0, edge="wall", step_cost="move",
                                       hazard_penalty_m=1000.0))
    return grid, model


def east_policy(model):
    return np.full(model.n_states, EAST, dtype=np.int64)


def ruin_probability(z: int, a: int, p: float) -> float:
    # Feller, An Introduction to Probability Theory and Its Applications, Vol. 1, 3rd ed.,
    # ch. XIV, sec. 2 (the classical ruin problem): q_z = ((q/p)^a - (q/p)^z) / ((q/p)^a - 1),
    # and q_z = 1 - z/a when p = q = 1/2.
    q = 1.0 - p
    if abs(p - q) < 1e-15:
        return 1.0 - z / a
    r = q / p
    return (r**a - r**z) / (r**a - 1.0)


def expected_duration(z: int, a: int, p: float) -> float:
    # Feller, Vol. 1, 3rd ed., ch. XIV, sec. 3 (expected duration of the game):
    # D_z = z/(q - p) - (a/(q - p)) (1 - (q/p)^z) / (1 - (q/p)^a), and D_z = z (a - z) when p = q.
    q = 1.0 - p
    if abs(p - q) < 1e-15:
        return z * (a - z)
    r = q / p
    return z / (q - p) - a / (q - p) * (1.0 - r**z) / (1.0 - r**a)


def duration_given_win(z: int, a: int, p: float) -> float:
    # Derived for this test, independently of the code under test: u(z) = E_z[T; win]
    # solves u(z) = P_z(win) + p u(z + 1) + q u(z - 1), u(0) = u(a) = 0. With r = q/p the
    # solution divided by P_z(win) is (a (1 + r^a)/(1 - r^a) - z (1 + r^z)/(1 - r^z)) / (p - q);
    # for p = 1/2 it is (a^2 - z^2) / 3. (Checked against a dense solve in
    # test_duration_given_win_formula.)
    q = 1.0 - p
    if abs(p - q) < 1e-15:
        return (a * a - z * z) / 3.0
    r = q / p
    return (a * (1 + r**a) / (1 - r**a) - z * (1 + r**z) / (1 - r**z)) / (p - q)


def test_duration_given_win_formula():
    # The derived closed form against a plain dense solve of the walk (numpy.linalg),
    # built from the walk's definition alone.
    for a, p in ((6, 0.3), (7, 0.5), (5, 0.8)):
        q = 1.0 - p
        t = np.zeros((a - 1, a - 1))
        for i in range(a - 1):
            if i + 1 < a - 1:
                t[i, i + 1] = p
            if i > 0:
                t[i, i - 1] = q
        n = np.linalg.inv(np.eye(a - 1) - t)
        win = n @ np.eye(a - 1)[:, -1] * p
        cond = (n @ win) / win
        assert_allclose(cond, [duration_given_win(z, a, p) for z in range(1, a)], rtol=1e-10)


@pytest.mark.parametrize("a, p", [(2, 0.5), (5, 0.5), (9, 0.5), (5, 0.3), (6, 0.6), (9, 0.8), (4, 0.95)])
def test_gamblers_ruin_closed_forms(a, p):
    for z in sorted({1, a // 2, a - 1}):
        _, model = corridor(a, z, west_chance=1.0 - p)
        row = evaluate(model, east_policy(model), noise=0.0)
        # Feller, Vol. 1, 3rd ed., ch. XIV, sec. 2 (ruin probability).
        assert_allclose(row.p_incident, ruin_probability(z, a, p), rtol=1e-10, atol=1e-12)
        assert_allclose(row.p_by_event["Drop"], ruin_probability(z, a, p), rtol=1e-10, atol=1e-12)
        assert_allclose(row.p_goal, 1.0 - ruin_probability(z, a, p), rtol=1e-10, atol=1e-12)
        assert row.p_never == 0.0 and row.n_trapped_states == 0
        # Derived closed form for the duration given a win (see duration_given_win).
        assert_allclose(row.expected_moves, duration_given_win(z, a, p), rtol=1e-9)
        # Every move commands one cell side (1 m).
        assert_allclose(row.expected_m, duration_given_win(z, a, p), rtol=1e-9)
        # Feller, Vol. 1, 3rd ed., ch. XIV, sec. 3 (expected duration), from every cell at once.
        result = absorption(model, epsilon_greedy(east_policy(model), 4, 0.0))
        cells = np.arange(1, a)
        assert_allclose(result.moves[cells], [expected_duration(k, a, p) for k in cells], rtol=1e-9)
        assert_allclose(risk_map(model, epsilon_greedy(east_policy(model), 4, 0.0))[cells],
                        [ruin_probability(k, a, p) for k in cells], rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("noise", [0.4, 1.0])
def test_lazy_walk_from_execution_noise(noise):
    # No drift: the noisy policy commands E with 1 - 3 noise / 4, W with noise / 4, and N
    # or S (noise / 2), which in a one-row walled corridor stay put. The walk is the
    # gambler's ruin with p' = P(E) / (P(E) + P(W)) slowed by stay-put steps, so the
    # ruin probability is Feller's with p' and the duration is Feller's divided by
    # 1 - P(stay) (each move is a real step with probability 1 - P(stay), a geometric
    # wait). Feller, Vol. 1, 3rd ed., ch. XIV, secs. 2-3.
    a, z = 6, 2
    p_e, p_w, p_stay = 1 - 3 * noise / 4, noise / 4, noise / 2
    p = p_e / (p_e + p_w)
    _, model = corridor(a, z)
    row = evaluate(model, east_policy(model), noise=noise)
    assert_allclose(row.p_incident, ruin_probability(z, a, p), rtol=1e-10)
    result = absorption(model, epsilon_greedy(east_policy(model), 4, noise))
    assert_allclose(result.moves[model.start], expected_duration(z, a, p) / (1 - p_stay), rtol=1e-9)
    assert_allclose(row.expected_moves, duration_given_win(z, a, p) / (1 - p_stay), rtol=1e-9)


def test_drunkards_walk_textbook():
    # Grinstead & Snell, Introduction to Probability, 2nd rev. ed., ch. 11, sec. 11.2,
    # Example 11.13 (drunkard's walk, states 0..4 absorbing at 0 and 4, p = 1/2):
    # B = [[3/4, 1/4], [1/2, 1/2], [1/4, 3/4]] and t = N 1 = (3, 4, 3).
    _, model = corridor(4, 2, west_chance=0.5)
    result = absorption(model, epsilon_greedy(east_policy(model), 4, 0.0))
    cells = [1, 2, 3]
    b = np.column_stack([result.probs[cells, EVENT_HAZARD], result.probs[cells, EVENT_GOAL]])
    assert_allclose(b, [[0.75, 0.25], [0.5, 0.5], [0.25, 0.75]], atol=1e-12)
    assert_allclose(result.moves[cells], [3.0, 4.0, 3.0], atol=1e-12)
    assert_allclose(result.never[cells], 0.0, atol=0)


def test_step_budget_matches_matrix_powers():
    # Reference: the walk's transition matrix built by hand (states 0..a, 0 and a
    # absorbing) raised to the T-th power with numpy; P(absorbed at a within T) is
    # entry (z, a) of P^T (the Chapman-Kolmogorov equations).
    a, z, p = 6, 3, 0.55
    walk = np.zeros((a + 1, a + 1))
    walk[0, 0] = walk[a, a] = 1.0
    for k in range(1, a):
        walk[k, k + 1], walk[k, k - 1] = p, 1 - p
    _, model = corridor(a, z, west_chance=1 - p)
    for budget in (0, 1, 3, 4, 17):
        row = evaluate(model, east_policy(model), noise=0.0, budget=budget)
        power = np.linalg.matrix_power(walk, budget)
        assert_allclose(row.p_goal_within_budget, power[z, a], atol=1e-14)
        assert_allclose(row.p_incident_within_budget, power[z, 0], atol=1e-14)
        assert_allclose(row.p_timeout, power[z, 1:a].sum(), atol=1e-14)


def test_trapped_policy_is_reported_not_an_error(rng):
    # Column 0 is free, and there the policy pushes into the wall for ever: a run that
    # reaches column 0 never ends. Reaching it is the gambler's ruin, so p_never equals
    # Feller's ruin probability (Vol. 1, 3rd ed., ch. XIV, sec. 2).
    a, z, p = 5, 2, 0.6
    _, model = corridor(a, z, west_chance=1 - p, first="free")
    policy = east_policy(model)
    policy[0] = WEST
    row = evaluate(model, policy, noise=0.0, rollouts=4000, rng=rng, budget=50)
    assert_allclose(row.p_never, ruin_probability(z, a, p), rtol=1e-10)
    assert_allclose(row.p_goal, 1 - ruin_probability(z, a, p), rtol=1e-10)
    assert row.p_incident == 0.0
    assert row.n_trapped_states == 1
    assert row.mc["never"].contains(row.p_never)
    assert row.p_timeout >= row.p_never
    # Wholly trapped: the policy drives straight into the wall with no drift.
    _, still = corridor(a, z, first="free")
    row = evaluate(still, np.full(still.n_states, WEST), noise=0.0)
    assert row.p_never == 1.0 and row.p_goal == 0.0 and math.isnan(row.expected_moves)
    # the one-line table says so in its P(never) column; the details name the trapped states
    assert "100%" in format_table([row]).splitlines()[2]
    assert "can never end the run" in format_table([row], details=True)


def test_entry_probability_of_a_zone_that_does_not_end_the_run(rng):
    # The zone at column 0 lets the run go on; P(at least one entry) is the probability
    # that the walk reaches 0 before a, Feller's ruin probability (Vol. 1, 3rd ed.,
    # ch. XIV, sec. 2). It is not an incident.
    a, z, p = 6, 3, 0.45
    grid, model = corridor(a, z, west_chance=1 - p, first="zone")
    row = evaluate(model, east_policy(model), noise=0.0, rollouts=4000, rng=rng)
    assert set(row.p_by_event) == {"boundary"}
    assert_allclose(row.p_entry["Drop"], ruin_probability(z, a, p), rtol=1e-10)
    assert row.mc["entry:Drop"].contains(row.p_entry["Drop"])
    assert_allclose(row.p_goal, 1.0, atol=1e-12)
    # Saying which hazards end the run gives the same row as reading it off the table.
    assert evaluate(model, east_policy(model), noise=0.0, hazards=grid.hazards).p_entry == row.p_entry


# ----------------------------------------------------------------------------- frozen lake

FROZEN_LAKE = ["SFFF", "FHFH", "FFFH", "HFFG"]


def frozen_lake_grid():
    """gymnasium's 4x4 FrozenLake map as a grid (holes end the run)."""
    return text_map_grid(FROZEN_LAKE)


def gymnasium_max_goal_probability():
    """Value iteration for max P(goal) on gymnasium's own FrozenLake-v1 table ``P``."""
    gym = pytest.importorskip("gymnasium")
    table = gym.make("FrozenLake-v1", map_name="4x4", is_slippery=True).unwrapped.P
    v = np.zeros(16)
    for _ in range(100_000):
        # Duplicate (probability, next) entries of one action simply add in the sum.
        new = np.array([max(sum(prob * (reward + (0.0 if done else v[nxt])) for prob, nxt, reward, done in table[s][a])
                            for a in range(4)) for s in range(16)])
        change = np.max(np.abs(new - v))
        v = new
        if change < 1e-15:
            break
    return v


def test_frozen_lake_optimal_goal_probability():
    # gymnasium's FrozenLake-v1 4x4, is_slippery=True (Farama Foundation, gymnasium 1.x):
    # intended and the two perpendicular moves each with probability 1/3, walls at the
    # edges, holes end the run. The optimal probability of reaching the goal from the
    # start with no step limit is 14/17 (value from memory), checked here by value
    # iteration on gymnasium's own transition table.
    v_gym = gymnasium_max_goal_probability()
    assert_allclose(v_gym[0], 14 / 17, atol=1e-9)
    # Our side: moves cost 1, a hole costs 10^4 moves, so one hole entry outweighs any
    # difference in expected moves (about 49 here) and the cost-optimal policy is a
    # P(goal)-maximising one, the fastest among them. Its greedy actions (ties to the
    # lowest index) then go through our risk solve. That this choice maximises P(goal)
    # is checked, not assumed: every state's P(goal) must equal gymnasium's optimum.
    grid = frozen_lake_grid()
    model = build_model(grid, Dynamics(n_actions=4, slip=2 / 3, edge="wall", step_cost="move",
                                       hazard_penalty_m=1e4))
    q = optimal_q(model).q
    row = evaluate(model, q, noise=0.0, hazards=grid.hazards)
    assert_allclose(row.p_goal, 14 / 17, atol=1e-6)
    assert_allclose(row.p_incident, 3 / 17, atol=1e-6)
    h = absorption(model, epsilon_greedy(greedy_actions(q), 4, 0.0)).probs[:, EVENT_GOAL]
    gym_index = np.array([(3 - r) * 4 + c for r in range(4) for c in range(4)])  # ours -> gymnasium state
    active = model.active
    assert_allclose(h[active], v_gym[gym_index][active], atol=1e-6)


# ----------------------------------------------------------------------------- Monte Carlo


def test_clopper_pearson_interval_reference_values():
    # Newcombe, R. G. (1998), "Two-sided confidence intervals for the single proportion:
    # comparison of seven methods", Statistics in Medicine 17, 857-872, Table I, exact
    # (Clopper-Pearson) method (values from memory, four decimals).
    for (k, n), (lo, hi) in {(81, 263): (0.2527, 0.3676), (15, 148): (0.0578, 0.1617),
                             (0, 20): (0.0, 0.1684), (1, 29): (0.0009, 0.1776)}.items():
        assert_allclose(exact_interval(k, n, Z95), (lo, hi), atol=5e-5)
    # Defining property (Clopper & Pearson, Biometrika 26(4), 1934), checked with scipy's
    # binomial distribution: P(X >= k | lo) = P(X <= k | hi) = alpha / 2.
    from scipy.stats import binom

    k, n = 37, 120
    lo, hi = exact_interval(k, n, Z95)
    assert_allclose(binom.sf(k - 1, n, lo), 0.025, rtol=1e-8)
    assert_allclose(binom.cdf(k, n, hi), 0.025, rtol=1e-8)


def small_site_grid(site_dict):
    site = site_from_geojson(site_dict)
    return site, rasterise(site, GridSpec(cell_m=2.0))


def test_exact_and_monte_carlo_agree_on_small_site(site_dict):
    # Monte Carlo on the same table, one seeded generator per row; every exact figure
    # (goal, incident, each zone, never, within the budget) must lie in the Clopper-Pearson
    # 95% interval of its count.
    _, grid = small_site_grid(site_dict)
    dynamics = Dynamics()
    model = build_model(grid, dynamics)
    policies = {"shortest": optimal_q(model).q, "cautious": on_policy_q(model, 0.1).q}
    rows = sensitivity(grid, dynamics, policies, noises=(0.0, 0.1, 0.3), drift_scales=(1.0, 2.0), budget=60,
                       rollouts=3000, seed=np.random.SeedSequence(20261202))
    assert len(rows) == 12
    assert [(r.drift_scale, r.policy, r.noise) for r in rows[:4]] == [
        (1.0, "shortest", 0.0), (1.0, "shortest", 0.1), (1.0, "shortest", 0.3), (1.0, "cautious", 0.0)]
    for r in rows:
        assert r.n_rollouts == 3000 and r.n_truncated == 0
        assert r.mc_disagrees == (), (r.policy, r.noise, r.drift_scale, r.mc_disagrees)
        assert_allclose(r.p_goal + r.p_incident + r.p_never, 1.0, atol=1e-9)
        assert set(r.mc) >= {"goal", "incident", "never", "event:Pond", "event:boundary", "timeout"}
    # Stronger drift and more noise do not make the shortest route safer here.
    by_key = {(r.policy, r.noise, r.drift_scale): r for r in rows}
    assert by_key["shortest", 0.3, 1.0].p_incident > by_key["shortest", 0.0, 1.0].p_incident


def test_monte_carlo_is_reproducible_and_does_not_advance_the_seed(site_dict):
    _, grid = small_site_grid(site_dict)
    model = build_model(grid, Dynamics())
    policy = np.full(model.n_states, 2, dtype=np.int64)  # always east
    seed = np.random.SeedSequence(7)
    one = sensitivity(grid, Dynamics(), {"east": policy}, noises=(0.1,), drift_scales=(1.0,), rollouts=500, seed=seed)
    two = sensitivity(grid, Dynamics(), {"east": policy}, noises=(0.1,), drift_scales=(1.0,), rollouts=500, seed=seed)
    assert [r.as_dict() for r in one] == [r.as_dict() for r in two]
    assert seed.n_children_spawned == 0
    probs = epsilon_greedy(policy, model.n_actions, 0.1)
    a = sample_runs(model, probs, 200, np.random.default_rng(3))
    b = sample_runs(model, probs, 200, np.random.default_rng(3))
    for x, y in zip(a, b, strict=True):
        np.testing.assert_array_equal(x, y)
    with pytest.raises(SettingsError):
        evaluate(model, policy, noise=0.1, rollouts=10)
    with pytest.raises(SettingsError):
        sensitivity(grid, Dynamics(), {"east": policy}, rollouts=10)


def test_q_table_and_its_greedy_actions_give_the_same_row(site_dict):
    _, grid = small_site_grid(site_dict)
    model = build_model(grid, Dynamics())
    # Values a whole metre apart: no ties, so the Q table's policy is its argmax (ties would
    # go to the safest action; see test_ties.py).
    order = np.tile(np.arange(model.n_actions, dtype=float), (model.n_states, 1))
    q = np.random.default_rng(11).permuted(order, axis=1)
    q[:, 2] += model.n_actions  # mostly east
    assert evaluate(model, q, noise=0.1) == evaluate(model, np.argmax(q, axis=1), noise=0.1)
    with pytest.raises(SettingsError):
        evaluate(model, np.zeros(3, dtype=np.int64), noise=0.1)


# ----------------------------------------------------------------------------- expectations given success


def forward_given_goal(model, action_probs, max_moves=20_000):
    """E[moves; goal] and E[commanded metres; goal] by running the distribution forward.

    A different derivation from the code under test: it carries, for every state, the
    probability of being there with the run going on and the expected metres already
    commanded on that event, and collects both when a move ends at the goal.
    """
    n_s, n_a = model.n_states, model.n_actions
    alive = np.zeros(n_s)
    alive[model.start] = 1.0
    metres_so_far = np.zeros(n_s)
    moves_on_goal = metres_on_goal = 0.0
    counts = np.diff(model.offsets)
    pair = np.repeat(np.arange(n_s * n_a), counts)
    state, action = pair // n_a, pair % n_a
    w = action_probs[state, action] * model.prob
    goal_o = model.event == EVENT_GOAL
    go_o = model.event == 0
    for n in range(max_moves):
        mass = alive[state] * w
        carried = metres_so_far[state] * w + mass * model.move_m[action]
        moves_on_goal += (n + 1) * mass[goal_o].sum()
        metres_on_goal += carried[goal_o].sum()
        alive = np.bincount(model.next_state[go_o], weights=mass[go_o], minlength=n_s)
        metres_so_far = np.bincount(model.next_state[go_o], weights=carried[go_o], minlength=n_s)
        if alive.sum() < 1e-16:
            break
    return moves_on_goal, metres_on_goal


def test_expectations_given_success_match_forward_computation():
    # 8 moves (straight moves 1 m, diagonals sqrt(2) m), slip, drift with spread,
    # noise: the h-transform answer must equal the forward computation.
    label = np.full((5, 6), FREE)
    label[2, 2:4] = 0
    goal = np.zeros(label.shape, dtype=bool)
    goal[4, 5] = True
    drifts = (DriftInfo("Gust", ratio=0.5, toward_deg=math.degrees(math.atan2(0.3, -0.4)), spread=0.6),)
    drift_class = np.zeros(label.shape, dtype=np.int32)
    drift_class[1:4, :] = 1
    grid = grid_from_arrays(label, goal=goal, start=(0, 0), hazards=(HazardInfo("Pit"),), drifts=drifts,
                            drift_class=drift_class, drift_members=((), (0,)))
    model = build_model(grid, Dynamics(slip=0.2, hazard_penalty_m=500.0))
    policy = np.random.default_rng(5).integers(0, 8, size=model.n_states)
    policy[::2] = 1  # north-east half of the time
    noise = 0.3
    row = evaluate(model, policy, noise=noise)
    moves_on_goal, metres_on_goal = forward_given_goal(model, epsilon_greedy(policy, 8, noise))
    assert 0 < row.p_goal < 1
    assert_allclose(row.expected_moves, moves_on_goal / row.p_goal, rtol=1e-8)
    assert_allclose(row.expected_m, metres_on_goal / row.p_goal, rtol=1e-8)


# ----------------------------------------------------------------------------- risk map properties


@st.composite
def small_grids(draw):
    n_rows = draw(st.integers(2, 4))
    n_cols = draw(st.integers(3, 5))
    n = n_rows * n_cols
    cells = draw(st.permutations(range(n)))
    start, goal_cell, extra = cells[0], cells[1], cells[2]
    hazard = draw(st.lists(st.booleans(), min_size=n, max_size=n))
    actions = draw(st.lists(st.integers(0, 7), min_size=n, max_size=n))
    noise = draw(st.sampled_from([0.0, 0.1, 0.5]))
    edge = draw(st.sampled_from(["boundary", "wall"]))
    return n_rows, n_cols, start, goal_cell, extra, hazard, actions, noise, edge


def build_small(n_rows, n_cols, start, goal_cell, hazard_cells, edge):
    label = np.full(n_rows * n_cols, FREE)
    label[list(hazard_cells)] = 0
    goal = np.zeros(n_rows * n_cols, dtype=bool)
    goal[goal_cell] = True
    grid = grid_from_arrays(label.reshape(n_rows, n_cols), goal=goal.reshape(n_rows, n_cols),
                            start=divmod(start, n_cols), hazards=(HazardInfo("H"),))
    return build_model(grid, Dynamics(slip=0.2, edge=edge, hazard_penalty_m=1000.0))


@settings(max_examples=40, deadline=None)
@given(small_grids())
def test_adding_a_hazard_never_lowers_risk(case):
    n_rows, n_cols, start, goal_cell, extra, hazard, actions, noise, edge = case
    hazard_cells = {i for i, h in enumerate(hazard) if h} - {start, goal_cell}
    before = build_small(n_rows, n_cols, start, goal_cell, hazard_cells - {extra}, edge)
    after = build_small(n_rows, n_cols, start, goal_cell, hazard_cells | {extra}, edge)
    probs = epsilon_greedy(np.array(actions), 8, noise)
    risk_before, risk_after = risk_map(before, probs), risk_map(after, probs)
    for risk, model in ((risk_before, before), (risk_after, after)):
        assert np.all(np.isnan(risk[~model.active]))
        assert np.all((risk[model.active] >= 0) & (risk[model.active] <= 1))
    both = before.active & after.active
    # Any run that ended in an incident still does; some may now end in the new hazard.
    assert np.all(risk_after[both] >= risk_before[both] - 1e-9)


# ----------------------------------------------------------------------------- clearance


def test_clearance_is_measured_on_the_true_polygon(site_dict):
    site, _ = small_site_grid(site_dict)
    pond = site.hazards[0]
    x0, y0, x1, y1 = pond.geometry.bounds
    # A straight route 10 m south of the pond's lowest point: the pond's own polygon
    # is 10 m away (plane geometry); its 2 m buffer would be 8 m.
    route = np.array([[x0 - 20.0, y0 - 10.0], [x1 + 20.0, y0 - 10.0]])
    assert_allclose(clearance_m(route, site.hazards)["Pond"], 10.0, atol=1e-6)
    assert_allclose(clearance_m(route, {"Pond buffered": pond.buffered})["Pond buffered"], 8.0, atol=0.05)
    # One point inside the pond: touching means 0.
    assert clearance_m([[(x0 + x1) / 2, (y0 + y1) / 2]], site.hazards) == {"Pond": 0.0}
    with pytest.raises(SettingsError):
        clearance_m(np.zeros((0, 2)), site.hazards)


# ----------------------------------------------------------------------------- formatting


@pytest.mark.parametrize("p, text", [
    # percent to two significant figures with "1 in N" (N = 1/p to two figures) up to one half
    (0.0, "0"), (1.0, "100%"), (1.2e-4, "0.012% (1 in 8,300)"), (0.0001, "0.010% (1 in 10,000)"),
    (9.96e-3, "1.0% (1 in 100)"), (0.01, "1.0% (1 in 100)"), (0.2193, "22% (1 in 4.6)"), (0.5, "50% (1 in 2.0)"),
    # above one half: the percentage alone, with the decimals that show the shortfall from 100%
    (0.9999, "99.99%"), (0.999997, "99.9997%"), (1 - 1e-12, "> 99.9999%"),
    # 1 / 1.1e-7 = 9.09 million; below 1e-6 the percentage saturates and "1 in N" carries the value
    (1.1e-7, "< 0.0001% (1 in 9.1 million)"),
    # below the solver floor
    (3e-300, "< 1 in 10^12"), (None, "-"), (float("nan"), "-"),
])
def test_format_prob(p, text):
    assert format_prob(p) == text


@pytest.mark.parametrize("lo, hi, text", [
    (9.1e-4, 1.5e-3, "0.091% to 0.15% (1 in 1,100 to 1 in 670)"),
    (0.0021, 0.002101, "0.21% (1 in 480)"),
    (0.0, 0.002, "0 to 0.20% (1 in 500)"),
    # the same percentage, different odds: 1 / 0.148 = 6.76, 1 / 0.152 = 6.58
    (0.148, 0.152, "15% (1 in 6.8 to 1 in 6.6)"),
])
def test_probability_range(lo, hi, text):
    from planner.notation import probability_range

    assert probability_range(lo, hi) == text
    assert probability_range(hi, lo) == text


def test_ratio_range_is_the_widest_the_intervals_allow():
    from planner.notation import ratio_range, times_range

    # riskier 0.1..0.2 over safer 0.001..0.002: 0.1/0.002 = 50 to 0.2/0.001 = 200
    lo, hi = ratio_range((0.001, 0.002), (0.1, 0.2))
    assert_allclose([lo, hi], [50.0, 200.0])
    assert times_range(lo, hi) == "50 to 200"
    assert times_range(240.4, 241.0) == "240"
    assert ratio_range((0.0, 0.1), (0.2, 0.3)) is None


def hand_row(**changes):
    base = dict(policy="cautious", noise=0.1, drift_scale=1.5, p_goal=0.97, p_incident=0.0299, p_never=1e-4,
                p_by_event={"boundary": 1.2e-4, "Pond": 0.02978}, expected_moves=41.25, expected_m=48.0,
                residual=1e-14, budget=100, p_goal_within_budget=0.95, p_incident_within_budget=0.0299,
                p_timeout=0.0201, p_entry={"Gravel": 0.33}, n_rollouts=1000,
                mc={"goal": McEstimate(980, 1000, 0.98, *exact_interval(980, 1000, Z95)),
                    "incident": McEstimate(20, 1000, 0.02, *exact_interval(20, 1000, Z95))},
                mc_disagrees=("goal",))
    base.update(changes)
    return RiskRow(**base)


def test_format_table_text_csv_json_markdown():
    rows = [hand_row(), hand_row(policy="shortest", expected_moves=math.nan, expected_m=math.nan, mc={},
                                 mc_disagrees=(), n_rollouts=0)]
    text = format_table(rows, "text")
    lines = text.splitlines()
    assert max(len(line) for line in lines) < 100
    # one line per row below the header and its rule, then the footnote and the hint
    assert lines[2].startswith("cautious ") and lines[3].startswith("shortest ")
    assert "97%!" in lines[2] and "! exact figure outside" in text
    assert "3.0% (1 in 33)" in lines[2] and "Pond" not in text
    detailed = format_table(rows, "text", details=True)
    assert "Pond 3.0% (1 in 34)" in detailed and "boundary 0.012% (1 in 8,300)" in detailed
    assert max(len(line) for line in detailed.splitlines()) < 100
    parsed = json.loads(format_table(rows, "json"))
    assert parsed[1]["expected_moves"] is None
    assert parsed[0]["mc"]["goal"]["count"] == 980
    assert parsed[0]["mc_disagrees"] == ["goal"]
    assert list(parsed[0]) == sorted(parsed[0])
    assert format_table(rows, "json") == format_table(rows, "json")
    table = list(csv.DictReader(io.StringIO(format_table(rows, "csv"))))
    assert float(table[0]["p_event:Pond"]) == 0.02978
    assert table[1]["expected_moves"] == "" and table[0]["mc_disagrees"] == "goal"
    md = format_table(rows, "markdown").splitlines()
    assert md[0].startswith("| policy |") and "97%!" in md[2] and md[-1].startswith("! exact figure")
    with pytest.raises(SettingsError):
        format_table(rows, "xml")


def test_flag_level_can_be_widened():
    # The interval shown is the one the flags use: Clopper-Pearson, 95% for display. For
    # 980 of 1000 its bounds solve P(X >= 980 | lo) = P(X <= 980 | hi) = 0.025 (checked
    # with scipy's binomial distribution); at z = 4 the lower bound falls to about 0.956.
    from scipy.stats import binom

    est = mc_estimate(980, 1000)
    assert_allclose(binom.sf(979, 1000, est.lo), 0.025, rtol=1e-8)
    assert_allclose(binom.cdf(980, 1000, est.hi), 0.025, rtol=1e-8)
    assert not est.contains(0.965)
    assert est.contains(0.965, z=4.0)
    text = format_table([hand_row(mc_flag_z=4.0)], "text")
    assert "Clopper-Pearson interval of its Monte Carlo count at z = 4.00" in " ".join(text.split())


def test_flags_use_the_exact_binomial_interval_at_small_counts():
    from planner.risk import table_flag_z

    # Clopper & Pearson (1934): with no event in n trials the upper bound solves
    # (1 - p)^n = alpha / 2, so p = 1 - (alpha / 2)^(1 / n) (closed form).
    lo, hi = exact_interval(0, 20000, Z95)
    assert lo == 0.0
    assert_allclose(hi, 1.0 - 0.025 ** (1.0 / 20000), rtol=1e-9)
    # One event in 20,000 runs where the exact probability is 8.5e-7 happens in about
    # 1.7% of tables: no evidence against the exact figure at a table-wide 95% level,
    # though Wilson's score interval (Wilson, JASA 22(158), 1927; its lower bound written
    # out here) at the same z excludes it.
    z = table_flag_z(400)
    assert mc_estimate(1, 20000).contains(8.5e-7, z)
    k, n = 1, 20000
    centre, half = (k / n + z * z / (2 * n)), z * math.sqrt(k / n * (1 - k / n) / n + z * z / (4 * n * n))
    assert (centre - half) / (1 + z * z / n) > 8.5e-7


@pytest.mark.parametrize("name", ["ground-yard", "drone-range"])
def test_demo_site_default_table_exact_and_monte_carlo_agree(name):
    """On each demo site, the default table (4 noise levels x 3 drift scales) of the two
    exact policies: the cautious one is safer at noise 0.1, and every Monte Carlo figure
    agrees with its exact value at the table-wide 95% level (seeded)."""
    from pathlib import Path

    from planner.grid import GridSpec, default_cell_m, rasterise
    from planner.model import Dynamics
    from planner.risk import sensitivity, table_flag_z
    from planner.site import load_site

    site = load_site(Path(__file__).resolve().parent.parent / "maps" / f"{name}.geojson")
    grid = rasterise(site, GridSpec(default_cell_m(site)))
    dynamics = Dynamics()
    model = build_model(grid, dynamics)
    policies = {"cautious": greedy_actions(on_policy_q(model, 0.1).q), "shortest": greedy_actions(optimal_q(model).q)}
    checks = 2 * 4 * 3 * (4 + len(grid.hazards))
    rows = sensitivity(grid, dynamics, policies, rollouts=20000, seed=20261202, flag_z=table_flag_z(checks))
    assert len(rows) == 24
    at = {(r.policy, r.noise, r.drift_scale): r for r in rows}
    assert at["cautious", 0.1, 1.0].p_incident < at["shortest", 0.1, 1.0].p_incident / 10
    assert [(r.policy, r.noise, r.drift_scale, r.mc_disagrees) for r in rows if r.mc_disagrees] == []
    for r in rows:
        assert abs(r.p_goal + r.p_incident + r.p_never - 1.0) < 1e-8


# ----------------------------------------------------------------------------- half-cell check


def test_a_policy_is_carried_to_the_finer_grid_by_position():
    from planner.gridcheck import carry_policy

    # 2 x 3 coarse cells of 2 m; the northern row is a hazard (not active).
    label = np.full((2, 3), FREE)
    label[1, :2] = 0
    goal = np.zeros((2, 3), dtype=bool)
    goal[1, 2] = True
    coarse = grid_from_arrays(label, goal=goal, start=(0, 0), cell_m=2.0, hazards=(HazardInfo("Pit"),))
    fine = grid_from_arrays(np.full((4, 6), FREE), goal=np.eye(4, 6, dtype=bool)[::-1], start=(0, 0), cell_m=1.0)
    greedy = np.array([2, 3, 4, 5, 6, 7])
    active = np.array([True, True, True, False, False, False])
    carried = carry_policy(coarse, active, greedy, fine).reshape(4, 6)
    # Fine cell (r, c) lies in coarse (r // 2, c // 2); the inactive northern cells
    # hand over the heading of the active cell just south of them (their nearest).
    expected = np.array([[2, 2, 3, 3, 4, 4]] * 4)
    assert_array_equal(carried, expected)


def test_grid_check_tolerance_is_ten_percent_or_the_99_percent_interval():
    from scipy.stats import beta

    from planner.gridcheck import GridCheck, compare_levels
    from planner.risk import McEstimate

    base = GridCheck(policy="shortest", noise=0.1, cell_m=4.0, fine_cell_m=2.0, p_incident=0.2)
    loose = compare_levels(base, 0.21)
    assert loose.tolerance == pytest.approx(0.02) and not loose.flagged and loose.relative == pytest.approx(0.05)
    assert compare_levels(base, 0.17).flagged
    # With 1,000 rollouts and 200 incidents the 99% Clopper-Pearson interval (beta
    # quantiles, Clopper & Pearson, Biometrika 26(4), 1934) is wider than 10%.
    lo, hi = beta.ppf(0.005, 200, 801), beta.ppf(0.995, 201, 800)
    row = type("Row", (), {"mc": {"incident": McEstimate(200, 1000, 0.2, 0.0, 1.0)}})()
    wide = compare_levels(base, 0.17, row)
    assert wide.tolerance == pytest.approx(max(0.2 - lo, hi - 0.2), rel=1e-6) and not wide.flagged


def test_richardson_recovers_a_second_order_error():
    from planner.gridcheck import richardson

    # f(h) = 1 + 0.5 h^2 on h = 4, 2, 1: order 2, limit 1, and the grid convergence index
    # 1.25 |f1 - f2| / (2^2 - 1) (Roache, Verification and Validation in Computational
    # Science and Engineering, 1998).
    values = [1 + 0.5 * h * h for h in (4.0, 2.0, 1.0)]
    r = richardson(values)
    assert r["order"] == pytest.approx(2.0) and r["extrapolated"] == pytest.approx(1.0)
    assert r["gci_fine"] == pytest.approx(1.25 * 1.5 / 3.0)
    assert richardson([1.0, 2.0, 1.5])["order"] is None  # oscillating: no order claimed


def test_half_cell_check_is_skipped_with_the_reason_above_the_cell_limit(site_dict):
    from planner.exact import optimal_q
    from planner.gridcheck import half_cell_check
    from planner.learn import greedy_actions
    from planner.risk import sensitivity
    from planner.site import site_from_geojson

    site = site_from_geojson(site_dict)
    spec = GridSpec(cell_m=4.0)
    grid = rasterise(site, spec)
    dynamics = Dynamics(move_m=4.0)
    model = build_model(grid, dynamics)
    greedy = {"shortest": greedy_actions(optimal_q(model).q)}
    rows = sensitivity(grid, dynamics, greedy, noises=(0.1,), drift_scales=(1.0,), model=model)
    skipped = half_cell_check(site, grid, spec, dynamics, model, greedy, rows, noise=0.1, max_cells=1000)
    assert skipped[0].skipped.startswith("the half-cell grid (2 m) would have about 1,500 cells, over the cell limit")
    checked = half_cell_check(site, grid, spec, dynamics, model, greedy, rows, noise=0.1)[0]
    assert checked.skipped is None and checked.fine_cell_m == 2.0 and 0.0 <= checked.p_incident_fine <= 1.0
    assert checked.p_incident == rows[0].p_incident
