"""Why a route is risky: the leg decomposition against an independent product-chain
solve, on every route of both demo sites, and the ranking of failure paths."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from test_ties import EPS, two_lanes_model

from planner.causes import failure_paths, leg_shares
from planner.exact import on_policy_q, optimal_q
from planner.model import EVENT_BOUNDARY, Dynamics, build_model
from planner.route import nominal_path
from planner.ties import equally_good, incident_from_every_state, safest_among

MAPS = Path(__file__).parents[1] / "maps"


def dense_chain(model, policy, eps):
    """Transient matrix and per-event absorption of ``policy`` flown with noise, dense."""
    n_s, n_a = model.n_states, model.n_actions
    t = np.zeros((n_s, n_s))
    b = np.zeros((n_s, len(model.event_names)))
    for k in range(n_s * n_a):
        s, a = divmod(k, n_a)
        w = (1 - eps) * (a == policy[s]) + eps / n_a
        for j in range(model.offsets[k], model.offsets[k + 1]):
            if model.event[j] == 0:
                t[s, model.next_state[j]] += w * model.prob[j]
            else:
                b[s, model.event[j]] += w * model.prob[j]
    return t, b


def product_chain_shares(model, policy, eps, route, legs):
    """P(incident in zone e, last on the route on leg j) by a dense solve of the chain on
    (cell, last leg) pairs: written here, independently of the code under test."""
    t, b = dense_chain(model, policy, eps)
    n_legs = int(max(legs)) + 1
    leg_of = {int(s): int(j) for s, j in zip(route, legs, strict=True)}
    act = np.flatnonzero(model.active)
    index = {(s, j): i for i, (s, j) in enumerate((s, j) for s in act for j in range(n_legs))}
    big_t = np.zeros((len(index), len(index)))
    big_b = np.zeros((len(index), n_legs, b.shape[1]))
    for (s, j), i in index.items():
        for s2 in np.flatnonzero(t[s]):
            j2 = leg_of.get(int(s2), j)
            big_t[i, index[(int(s2), j2)]] += t[s, s2]
        big_b[i, j] += b[s]
    x0 = index[(model.start, leg_of[model.start])]
    rhs = big_b.reshape(len(index), -1)
    sol = np.linalg.solve(np.eye(len(index)) - big_t, rhs)
    return sol[x0].reshape(n_legs, -1)[:, EVENT_BOUNDARY:]


def test_leg_shares_match_a_product_chain_solve():
    grid, model = two_lanes_model()
    q = optimal_q(model).q
    policy = safest_among(model, equally_good(q), EPS, value=q).greedy
    route = nominal_path(model, policy).states
    legs = np.minimum(np.arange(route.size) // 2, 1)
    shares = leg_shares(model, policy, EPS, route, legs)
    assert_allclose(shares.shares, product_chain_shares(model, policy, EPS, route, legs), atol=1e-12)
    assert_allclose(shares.p_incident, incident_from_every_state(model, policy, EPS)[model.start], atol=1e-12)


@pytest.mark.parametrize("site_file", ["ground-yard.geojson", "drone-range.geojson"])
def test_leg_shares_sum_to_the_route_risk_on_the_demo_sites(site_file):
    from planner.causes import legs_of_route
    from planner.grid import GridSpec, rasterise
    from planner.route import build_route
    from planner.site import load_site

    site = load_site(MAPS / site_file)
    grid = rasterise(site, GridSpec(7.5))
    model = build_model(grid, Dynamics())
    for name, solution in (("shortest", optimal_q(model)), ("cautious", on_policy_q(model, EPS))):
        policy = safest_among(model, equally_good(solution.q), EPS, value=solution.q).greedy
        path = nominal_path(model, policy)
        legs = legs_of_route(build_route(name, path, grid, site, model))[: path.states.size]
        shares = leg_shares(model, policy, EPS, path.states, legs)
        total = incident_from_every_state(model, policy, EPS)[model.start]
        assert abs(shares.p_incident - total) <= 1e-9, name
        assert shares.shares.min() >= 0


def test_failure_paths_are_ranked_and_their_probabilities_are_products_along_them():
    grid, model = two_lanes_model()
    q = optimal_q(model).q
    policy = safest_among(model, equally_good(q), EPS, value=q).greedy
    t, b = dense_chain(model, policy, EPS)
    paths = failure_paths(model, policy, EPS, k=3)
    assert paths
    names = list(model.event_names)
    for zone in {p.zone for p in paths}:
        probs = [p.probability for p in paths if p.zone == zone]
        assert probs == sorted(probs, reverse=True)
    for p in paths:
        cells = p.states
        assert cells[0] == model.start
        expect = np.prod([t[a, c] for a, c in zip(cells[:-1], cells[1:], strict=True)]) * b[cells[-1], names.index(p.zone)]
        assert_allclose(p.probability, expect, rtol=1e-9)
        # Every failure needs at least one move off the policy's likeliest landing.
        assert p.off_policy
