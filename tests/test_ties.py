"""Ties broken by safety, and the risk verdict on learned policies.

Checked against absorbing-chain equations written out by hand for a small layout, and
against the cliff layout of Sutton & Barto, Reinforcement Learning: An Introduction,
2nd ed. (2018), Example 6.6.
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import text_map_grid
from numpy.testing import assert_allclose
from test_exact import BOOK, cliff_model

from planner.errors import SettingsError
from planner.exact import on_policy_q, optimal_q
from planner.learn import greedy_actions
from planner.model import Dynamics, build_model
from planner.ties import DEFAULT_TIE_M, check_tie_tolerance, equally_good, incident_from_every_state, safest_among
from planner.verdict import risk_verdict

#: Noise of the hand-worked case.
EPS = 0.1
#: North first: an upper drop edge (H) above the north lane, the pit (H) between start and
#: goal, a south lane along the southern wall.
TWO_LANES = ["HHH", "FFF", "SHG", "FFF"]
N, E, S, W = 0, 1, 2, 3


def two_lanes_model():
    grid = text_map_grid(TWO_LANES, hazard_name="drop")
    return grid, build_model(grid, Dynamics(n_actions=4, stall=0.0, drift_scale=0.0, hazard_penalty_m=100.0, **BOOK))


def two_lanes_by_hand(eps: float, first: int) -> float:
    """P(incident) from the start when the first move is ``first`` (N or S), by hand.

    Execution: the intended heading with probability ``P = 1 - eps + q``, each other
    heading with ``q = eps / 4``; a move into the wall stays put; a move into the drop
    edge or the pit ends the run (1), the goal ends it safely (0). The lanes' policies
    are the only shortest ones (east along the lane, then into the goal). Writing
    ``x`` for the start, ``n0 n1 n2`` for the north lane (west to east) and ``s0 s1 s2``
    for the south lane, the absorbing chain's equations are::

        n0 = P n1 + q 1  + q x  + q n0      (E intended; N drop, S start, W wall)
        n1 = P n2 + q 1  + q 1  + q n0      (E; N drop, S pit, W back)
        n2 = P 0  + q 1  + q n2 + q n1      (S into the goal; N drop, E wall, W back)
        s0 = P s1 + q x  + q s0 + q s0      (E; N start, S wall, W wall)
        s1 = P s2 + q 1  + q s1 + q s0      (E; N pit, S wall, W back)
        s2 = P 0  + q s2 + q s2 + q s1      (N into the goal; E wall, S wall, W back)
        x  = P n0 + q 1 + q s0 + q x        (first move N; E pit, S, W wall)
        x  = P s0 + q 1 + q n0 + q x        (first move S; E pit, N, W wall)

    seven linear equations in seven unknowns, solved here with a dense solve.
    """
    q = eps / 4
    p = 1 - eps + q
    x, n0, n1, n2, s0, s1, s2 = range(7)
    a = np.eye(7)
    b = np.zeros(7)

    def eq(row, terms, const):
        for col, coef in terms:
            a[row, col] -= coef
        b[row] = const

    eq(n0, [(n1, p), (x, q), (n0, q)], q)
    eq(n1, [(n2, p), (n0, q)], 2 * q)
    eq(n2, [(n2, q), (n1, q)], q)
    eq(s0, [(s1, p), (x, q), (s0, 2 * q)], 0.0)
    eq(s1, [(s2, p), (s1, q), (s0, q)], q)
    eq(s2, [(s2, 2 * q), (s1, q)], 0.0)
    if first == N:
        eq(x, [(n0, p), (s0, q), (x, q)], q)
    else:
        eq(x, [(s0, p), (n0, q), (x, q)], q)
    return float(np.linalg.solve(a, b)[x])


def test_two_lanes_the_safer_of_two_equally_short_routes_is_delivered():
    grid, model = two_lanes_model()
    q = optimal_q(model).q
    s0 = model.start
    allowed = equally_good(q)
    # The two mirror-image routes tie at the start, and only there.
    assert allowed[s0].tolist() == [True, False, True, False]
    choice = safest_among(model, allowed, EPS, value=q)
    north, south = two_lanes_by_hand(EPS, N), two_lanes_by_hand(EPS, S)
    assert south < north
    assert choice.greedy[s0] == S
    assert_allclose(choice.p_incident, south, rtol=1e-9)
    # The range is exactly the two routes' figures.
    assert_allclose([choice.p_incident, choice.p_incident_max], [south, north], rtol=1e-9)
    assert choice.riskiest[s0] == N
    assert choice.n_tied_states == 1


def test_two_lanes_a_tie_break_by_action_index_would_report_the_riskier_route():
    # Breaking the tie by the lowest action index takes N (index 0): the riskier lane. The
    # check above would fail for such a rule.
    grid, model = two_lanes_model()
    q = optimal_q(model).q
    by_index = greedy_actions(q)
    p_index = incident_from_every_state(model, by_index, EPS)[model.start]
    assert_allclose(p_index, two_lanes_by_hand(EPS, N), rtol=1e-9)
    assert p_index > safest_among(model, equally_good(q), EPS, value=q).p_incident * 1.5


def test_cliff_cautious_range_collapses_and_shortest_range_is_a_true_optimum():
    # Example 6.6, Sutton & Barto 2nd ed. (2018), with the cliff ending the run: the
    # on-policy fixed point at epsilon 0.1 has no ties, so its range is one value.
    model = cliff_model()
    onp = on_policy_q(model, EPS)
    cautious = safest_among(model, equally_good(onp.q), EPS, value=onp.q)
    assert cautious.n_tied_states == 0
    assert cautious.p_incident == cautious.p_incident_max
    # The optimum's one shortest route from the start is unique, but off the route many
    # cells have two equally short ways on (east first or down first), and under noise the
    # vehicle visits them: the range does not collapse. Check each end is a true optimum
    # of its problem with an independent dense solve: no allowed action improves on it.
    opt = optimal_q(model)
    allowed = equally_good(opt.q)
    choice = safest_among(model, allowed, EPS, value=opt.q)
    assert choice.n_tied_states > 0
    assert choice.p_incident < choice.p_incident_max
    for policy, sign in ((choice.greedy, 1.0), (choice.riskiest, -1.0)):
        u = _dense_incident(model, policy, EPS)
        one_step = _dense_one_step(model, u, EPS)
        chosen = one_step[np.arange(model.n_states), policy]
        # sign 1: no allowed action is safer than the one taken; -1: none is riskier.
        improves = allowed & (sign * (chosen[:, None] - one_step) > 1e-10)
        assert not improves[model.active].any()
        assert_allclose(u[model.start], choice.p_incident if sign > 0 else choice.p_incident_max, rtol=1e-9)


def _dense_outcomes(model):
    """(state, action, next, prob, incident, goes_on) rows read straight off the table."""
    n_a = model.n_actions
    for k in range(model.n_states * n_a):
        for j in range(model.offsets[k], model.offsets[k + 1]):
            yield k // n_a, k % n_a, int(model.next_state[j]), float(model.prob[j]), model.event[j] >= 2, \
                model.event[j] == 0


def _dense_incident(model, policy, eps):
    """P(incident) of ``policy`` with noise, by a dense solve written here."""
    n_s, n_a = model.n_states, model.n_actions
    t = np.zeros((n_s, n_s))
    b = np.zeros(n_s)
    for s, a, nxt, p, incident, going in _dense_outcomes(model):
        w = (1 - eps) * (a == policy[s]) + eps / n_a
        if going:
            t[s, nxt] += w * p
        elif incident:
            b[s] += w * p
    act = model.active
    x = np.zeros(n_s)
    x[act] = np.linalg.solve(np.eye(act.sum()) - t[np.ix_(act, act)], b[act])
    return x


def _dense_one_step(model, u, eps):
    """P(incident) of taking each action once, then following ``u``, with noise."""
    n_s, n_a = model.n_states, model.n_actions
    r = np.zeros((n_s, n_a))
    for s, a, nxt, p, incident, going in _dense_outcomes(model):
        r[s, a] += p * (u[nxt] if going else float(incident))
    return (1 - eps) * r + eps * r.mean(axis=1, keepdims=True)


def test_verdict_passes_the_reference_and_fails_the_riskier_tie_break():
    grid, model = two_lanes_model()
    q = optimal_q(model).q
    ref = safest_among(model, equally_good(q), EPS, value=q)
    good = risk_verdict(model, ref.greedy, ref)
    assert good.converged and good.message.startswith("converged")
    # The riskier lane is still inside the reference's own tie range: equally short, and
    # within the range of policies the reference could have been.
    assert risk_verdict(model, ref.riskiest, ref).converged
    # A policy that walks into the pit from the start is far outside the band.
    bad_policy = ref.greedy.copy()
    bad_policy[model.start] = E
    bad = risk_verdict(model, bad_policy, ref)
    assert not bad.converged
    assert bad.message.startswith("NOT CONVERGED")
    assert bad.p_incident > bad.band_high


def test_verdict_band_is_the_range_widened_by_ten_percent_or_the_monte_carlo_interval():
    grid, model = two_lanes_model()
    q = optimal_q(model).q
    ref = safest_among(model, equally_good(q), EPS, value=q)
    v = risk_verdict(model, ref.greedy, ref)
    assert_allclose([v.band_low, v.band_high], [0.9 * ref.p_incident, 1.1 * ref.p_incident_max])
    wide = risk_verdict(model, ref.greedy, ref, mc_halfwidth=0.5)
    assert wide.band_low == 0.0
    assert_allclose(wide.band_high, min(1.0, ref.p_incident_max + 0.5))


def test_verdict_reports_the_spread_across_seeds():
    grid, model = two_lanes_model()
    q = optimal_q(model).q
    ref = safest_among(model, equally_good(q), EPS, value=q)
    v = risk_verdict(model, ref.greedy, ref, seed_policies=[ref.greedy, ref.riskiest])
    assert_allclose([v.seeds_low, v.seeds_high], [ref.p_incident, ref.p_incident_max])


def test_tie_tolerance_below_the_cheapest_move_only():
    grid, model = two_lanes_model()
    check_tie_tolerance(model, DEFAULT_TIE_M)
    with pytest.raises(SettingsError, match="cheapest move"):
        check_tie_tolerance(model, 1.0)
    with pytest.raises(SettingsError, match=">= 0"):
        check_tie_tolerance(model, -0.1)


def test_a_wider_tolerance_admits_longer_routes_and_never_raises_the_delivered_risk():
    grid, model = two_lanes_model()
    q = optimal_q(model).q
    tight = safest_among(model, equally_good(q, 0.0), EPS, value=q)
    loose = safest_among(model, equally_good(q, 0.9), EPS, value=q)
    assert loose.p_incident <= tight.p_incident + 1e-15


@pytest.mark.parametrize("site_file", ["ground-yard.geojson", "drone-range.geojson"])
@pytest.mark.parametrize("cell_m", [10.0, 7.5])
def test_demo_sites_the_delivered_reference_is_the_least_risk_of_its_ties(site_file, cell_m):
    # On both demo sites at two cell sizes, for both fixed points: the delivered reference's
    # P(incident) is the low end of its range, and no tie-break drawn at random (each
    # evaluated by the risk table's own absorbing-chain solve) falls outside the range.
    from pathlib import Path

    from planner.grid import GridSpec, rasterise
    from planner.risk import evaluate
    from planner.site import load_site

    site = load_site(Path(__file__).parents[1] / "maps" / site_file)
    grid = rasterise(site, GridSpec(cell_m))
    model = build_model(grid, Dynamics())
    rng = np.random.default_rng(12)
    for solution in (optimal_q(model), on_policy_q(model, EPS)):
        allowed = equally_good(solution.q)
        choice = safest_among(model, allowed, EPS, value=solution.q)
        delivered = evaluate(model, choice.greedy, noise=EPS, hazards=grid.hazards).p_incident
        assert_allclose(delivered, choice.p_incident, rtol=1e-9, atol=1e-15)
        assert choice.p_incident <= choice.p_incident_max
        for _ in range(6):
            keys = np.where(allowed, rng.random(allowed.shape), -1.0)
            drawn = evaluate(model, np.argmax(keys, axis=1), noise=EPS, hazards=grid.hazards).p_incident
            assert choice.p_incident - 1e-12 <= drawn <= choice.p_incident_max + 1e-12
