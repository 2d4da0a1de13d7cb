"""Ties broken by safety with the figures solved by Gauss-Seidel sweeps (the large-chain
path) instead of sparse LU: the same policies and figures as the hand-worked absorbing
chains of ``test_ties`` and as dense solves written out here."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from test_exact import cliff_model
from test_ties import EPS, N, S, _dense_incident, _dense_one_step, two_lanes_by_hand, two_lanes_model

import planner.ties as ties
from planner.exact import on_policy_q, optimal_q
from planner.ties import equally_good, expected_metres, incident_from_every_state, safest_among


@pytest.fixture
def swept(monkeypatch):
    """Every chain counts as large: figures come from the sweeps."""
    monkeypatch.setattr(ties, "LU_MAX_ENTRIES", -1)
    calls = []
    real = ties._swept_figures

    def counted(*args, **kwargs):
        out = real(*args, **kwargs)
        calls.append(out is not None)
        return out

    monkeypatch.setattr(ties, "_swept_figures", counted)
    return calls


def _dense_metres(model, policy, eps):
    """Expected commanded metres to the end of the run, by a dense solve written here."""
    n_s, n_a = model.n_states, model.n_actions
    t = np.zeros((n_s, n_s))
    c = np.zeros(n_s)
    for k in range(n_s * n_a):
        s, a = divmod(k, n_a)
        w = (1 - eps) * (a == policy[s]) + eps / n_a
        c[s] += w * model.move_m[a] * model.active[s]
        for j in range(model.offsets[k], model.offsets[k + 1]):
            if model.event[j] == 0:
                t[s, model.next_state[j]] += w * model.prob[j]
    act = model.active
    x = np.zeros(n_s)
    x[act] = np.linalg.solve(np.eye(act.sum()) - t[np.ix_(act, act)], c[act])
    return x[model.start]


def test_two_lanes_by_sweeps_match_the_hand_solution(swept):
    grid, model = two_lanes_model()
    q = optimal_q(model).q
    choice = safest_among(model, equally_good(q), EPS, value=q)
    assert swept and all(swept)
    south, north = two_lanes_by_hand(EPS, S), two_lanes_by_hand(EPS, N)
    assert choice.greedy[model.start] == S and choice.riskiest[model.start] == N
    assert_allclose([choice.p_incident, choice.p_incident_max], [south, north], rtol=1e-11)
    assert_allclose(choice.incident[model.start], south, rtol=1e-11)


def test_cliff_by_sweeps_both_ends_are_optima_and_figures_match_dense_solves(swept):
    model = cliff_model()
    for solution in (optimal_q(model), on_policy_q(model, EPS)):
        allowed = equally_good(solution.q)
        choice = safest_among(model, allowed, EPS, value=solution.q)
        assert swept and all(swept)
        for policy, sign, figure in ((choice.greedy, 1.0, choice.p_incident),
                                     (choice.riskiest, -1.0, choice.p_incident_max)):
            u = _dense_incident(model, policy, EPS)
            one_step = _dense_one_step(model, u, EPS)
            chosen = one_step[np.arange(model.n_states), policy]
            assert not (allowed & (sign * (chosen[:, None] - one_step) > 1e-10))[model.active].any()
            assert_allclose(figure, u[model.start], rtol=1e-11)
        assert_allclose(choice.incident[model.active], _dense_incident(model, choice.greedy, EPS)[model.active],
                        rtol=1e-10, atol=1e-14)
        assert_allclose(choice.expected_m, _dense_metres(model, choice.greedy, EPS), rtol=1e-11)
        assert_allclose(expected_metres(model, choice.greedy, EPS), choice.expected_m, rtol=1e-11)


def test_sweeps_and_lu_give_the_same_figures_from_every_state(monkeypatch):
    model = cliff_model()
    greedy = np.argmax(on_policy_q(model, 0.3).q, axis=1)
    by_lu = incident_from_every_state(model, greedy, 0.3)
    monkeypatch.setattr(ties, "LU_MAX_ENTRIES", -1)
    by_sweeps = incident_from_every_state(model, greedy, 0.3)
    assert_allclose(by_sweeps, by_lu, rtol=1e-11, atol=1e-15)


def test_sweeps_that_do_not_settle_fall_back_to_lu(monkeypatch):
    # Capped at one sweep the figures cannot settle; the LU answers instead.
    grid, model = two_lanes_model()
    q = optimal_q(model).q
    monkeypatch.setattr(ties, "LU_MAX_ENTRIES", -1)
    monkeypatch.setattr(ties, "MAX_FIGURE_SWEEPS", 1)
    choice = safest_among(model, equally_good(q), EPS, value=q)
    assert_allclose(choice.p_incident, two_lanes_by_hand(EPS, S), rtol=1e-12)
