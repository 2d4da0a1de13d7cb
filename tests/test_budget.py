"""The risk budget and the trade-off curve, against hand policies, the occupancy LP and
the cliff layout of Sutton & Barto, Reinforcement Learning: An Introduction, 2nd ed.
(2018), Example 6.6."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from test_exact import cliff_model

from planner.budget import constrained_lp, cost_only, risk_budget, tradeoff_curve
from planner.errors import SettingsError
from planner.model import EVENT_BOUNDARY
from planner.route import nominal_path

EPS = 0.1
N, E, S, W = 0, 1, 2, 3
ROWS, COLS = 4, 12


@pytest.fixture(scope="module")
def cliff():
    return cliff_model()


@pytest.fixture(scope="module")
def curve(cliff):
    # Exact ties only (tie_m 0): with the product's 1 cm tolerance each vertex is optimal
    # only to within 1 cm, and the checks against the LP below are to 1e-6.
    return tradeoff_curve(cliff, EPS, tie_m=0.0)


def ride_row(k: int) -> np.ndarray:
    """The hand policy that rides row ``k`` (1 = the cliff edge): climb to it, go east
    along it, drop to the goal in the last column."""
    policy = np.zeros(ROWS * COLS, dtype=np.int64)
    for r in range(ROWS):
        for c in range(COLS):
            if c == COLS - 1:
                a = S
            elif r < k:
                a = N
            elif r > k:
                a = S
            else:
                a = E
            policy[r * COLS + c] = a
    return policy


def dense_figures(model, policy, eps):
    """P(incident) and expected length (moves, here) of ``policy`` flown with noise,
    by a dense absorbing-chain solve written here from the model's outcome table."""
    n_s, n_a = model.n_states, model.n_actions
    t = np.zeros((n_s, n_s))
    b = np.zeros(n_s)
    c = np.zeros(n_s)
    base = cost_only(model).reward
    for k in range(n_s * n_a):
        s, a = divmod(k, n_a)
        w = (1 - eps) * (a == policy[s]) + eps / n_a
        for j in range(model.offsets[k], model.offsets[k + 1]):
            p = w * model.prob[j]
            c[s] -= p * base[j]
            if model.event[j] == 0:
                t[s, model.next_state[j]] += p
            elif model.event[j] >= EVENT_BOUNDARY:
                b[s] += p
    act = model.active
    sub = np.eye(act.sum()) - t[np.ix_(act, act)]
    p_inc, length = np.zeros(n_s), np.zeros(n_s)
    p_inc[act] = np.linalg.solve(sub, b[act])
    length[act] = np.linalg.solve(sub, c[act])
    return p_inc[model.start], length[model.start]


def lowest_row(model, policy) -> int:
    """The row closest to the cliff the nominal route rides above the cliff (columns 1-10)."""
    path = nominal_path(model, policy)
    cells = [np.unravel_index(s, model.shape) for s in path.states[1:]]
    return min(int(r) for r, c in cells if 1 <= c <= COLS - 2)


def test_curve_falls_in_risk_and_rises_in_length(curve):
    points, n_solves = curve
    assert len(points) >= 3 and n_solves <= 200
    p = np.array([x.p_incident for x in points])
    length = np.array([x.length_m for x in points])
    assert np.all(np.diff(p) < 0) and np.all(np.diff(length) > 0)
    # The lower convex hull: slopes -d(length)/d(P) grow along it.
    slopes = -np.diff(length) / np.diff(p)
    assert np.all(np.diff(slopes) > -1e-9 * slopes[1:])


def test_cliff_route_moves_off_the_edge_one_row_at_a_time_as_the_budget_falls(cliff):
    # Example 6.6 (the cliff ends the run, noise 0.1). With the budget at the risk of the
    # hand policy riding row k, the budget route rides row k. The hand policy is feasible
    # there, so the exact constrained optimum (the LP, which may mix two policies) is at
    # most as long; the delivered deterministic route is a vertex of the trade-off curve,
    # at least as long as that optimum. (A deterministic policy off the curve can be
    # shorter than the delivered one: riding row 1 is, by 0.17 moves.)
    for k in (1, 2, 3):
        p_k, length_k = dense_figures(cliff, ride_row(k), EPS)
        answer = risk_budget(cliff, EPS, p_k)
        assert answer.met and answer.route.p_incident <= p_k + 1e-12
        assert lowest_row(cliff, answer.route.greedy) == k
        lp, _ = constrained_lp(cliff, EPS, p_k)
        assert lp <= length_k + 1e-9
        assert answer.route.length_m >= lp - 1e-9


def test_budget_matches_the_occupancy_lp(cliff, curve):
    points, _ = curve
    # Between two vertices: the mixture's length is the LP optimum; at a vertex's own
    # risk: the deterministic route's length is.
    # (Budgets a reviewer could sign: the curve's low-penalty end, where runs end in a
    # hazard almost surely, is left out.)
    pairs = [(hi, lo) for hi, lo in zip(points[1:], points[:-1], strict=True) if lo.p_incident < 0.5]
    assert len(pairs) >= 3
    for hi, lo in pairs:
        mid = 0.5 * (hi.p_incident + lo.p_incident)
        answer = risk_budget(cliff, EPS, mid, tie_m=0.0)
        lp, _ = constrained_lp(cliff, EPS, mid)
        assert answer.mix_share is not None and 0 < answer.mix_share < 1
        assert_allclose(answer.mixed_length_m, lp, rtol=1e-6)
        assert_allclose(answer.shorter.p_incident * answer.mix_share
                        + answer.route.p_incident * (1 - answer.mix_share), mid, rtol=1e-9)
    vertex = points[len(points) // 2]
    lp, _ = constrained_lp(cliff, EPS, vertex.p_incident)
    assert_allclose(risk_budget(cliff, EPS, vertex.p_incident, tie_m=0.0).route.length_m, lp, rtol=1e-6)


def test_a_budget_no_route_meets_is_an_answer(cliff, curve):
    points, _ = curve
    least = points[-1].p_incident
    answer = risk_budget(cliff, EPS, least / 10)
    assert not answer.met and answer.shorter is None and answer.mix_share is None
    assert_allclose(answer.route.p_incident, least, rtol=1e-6)
    assert answer.gap < 0
    with pytest.raises(SettingsError, match="infeasible|programme"):
        constrained_lp(cliff, EPS, least / 10)


@pytest.mark.parametrize("bad", [-0.1, 1.5, float("nan"), "1e-3", True])
def test_bad_budgets_are_refused(cliff, bad):
    with pytest.raises(SettingsError, match="risk budget"):
        risk_budget(cliff, EPS, bad)
