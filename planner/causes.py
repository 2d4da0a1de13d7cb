"""Why a route is risky: where along it the risk comes from, and the likeliest ways it fails.

Part of the risk stage. For a policy flown with noise epsilon, its absorbing chain gives

* :func:`leg_shares`: P(incident) split over the legs of the nominal route by the leg
  on which the vehicle was last on the nominal route before the incident, and over the
  zones it ends in. Every run that ends in an incident leaves the nominal route for the
  last time exactly once (the start is on it), so the shares sum to P(incident)
  exactly. With ``R`` the route's cells, ``x`` the expected visits to each cell from the
  start and ``h_e(s)`` the probability of ending in zone ``e`` from ``s`` before coming
  back to ``R`` (``h_e = 0`` on ``R``), the share of route cell ``r`` in zone ``e`` is
  ``x(r) (b_e(r) + sum over s not in R of T(r, s) h_e(s))``, ``b_e`` the one-move
  probability of ending in ``e``.
* :func:`failure_paths`: the few most probable paths of the chain from the start into
  each zone, ranked by probability (Yen's k shortest simple paths on minus
  log-probability edge weights, networkx ``shortest_simple_paths``), with the moves
  where noise or drift took the vehicle off the policy's own most likely landing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from planner.errors import SettingsError
from planner.model import EVENT_BOUNDARY, Model, epsilon_greedy, policy_chain, reaches_absorption, solve_transient

#: Cells whose expected visits fall below this are left out of the failure-path graph.
PATH_VISIT_FLOOR = 1e-9
#: Zones a run ends in with a probability below this, or below ``PATH_ZONE_SHARE`` of
#: the route's P(incident), get no failure paths (they explain nothing worth drawing).
PATH_ZONE_FLOOR = 1e-9
PATH_ZONE_SHARE = 1e-3


@dataclass(frozen=True)
class LegShares:
    """P(incident) of one policy split over the legs of its nominal route and the zones.

    Attributes
    ----------
    shares : float64 ``(n_legs, n_zones)``: P(the run ends in zone ``e`` and the vehicle
        was last on the nominal route on leg ``j``).
    zones : the zone of each column (``"boundary"`` and each hazard that ends the run).
    p_incident : the total, ``shares.sum()``.
    """

    shares: np.ndarray
    zones: tuple[str, ...]
    p_incident: float

    def by_leg(self) -> np.ndarray:
        """float64 ``(n_legs,)``, summed over zones."""
        return self.shares.sum(axis=1)


def leg_shares(model: Model, greedy: np.ndarray, epsilon: float, route_states, leg_of) -> LegShares:
    """Split P(incident) over the legs of the nominal route (see the module notes).

    Parameters
    ----------
    model : the model.
    greedy : int ``(n_states,)`` the policy.
    epsilon : execution noise in [0, 1).
    route_states : int, the nominal route's cells in order, the start first.
    leg_of : int, the leg of each of those cells (0-based, non-decreasing).

    Returns
    -------
    LegShares
    """
    route_states = np.asarray(route_states, dtype=np.int64)
    leg_of = np.asarray(leg_of, dtype=np.int64)
    if route_states.size == 0 or route_states[0] != model.start or leg_of.shape != route_states.shape:
        raise SettingsError("leg_shares needs the route's cells from the start and one leg per cell")
    chain = policy_chain(model, epsilon_greedy(greedy, model.n_actions, epsilon))
    ends = reaches_absorption(chain, model.active)
    columns = np.arange(EVENT_BOUNDARY, len(model.event_names))
    b = chain.absorb[:, columns].toarray()
    on_route = np.zeros(model.n_states, dtype=bool)
    on_route[route_states] = True
    off = ends & ~on_route
    h = np.zeros_like(b)
    if off.any():
        h, _ = solve_transient(chain, b, off)
    e_start = np.zeros(model.n_states)
    e_start[model.start] = 1.0
    visits, _ = solve_transient(chain, e_start, ends, transpose=True)
    leaving = np.asarray(chain.transient @ h).reshape(b.shape)
    # A cell the route passes twice counts once: its visits already include both.
    cells, first = np.unique(route_states, return_index=True)
    per_cell = visits[cells, None] * (b[cells] + leaving[cells])
    n_legs = int(leg_of.max()) + 1
    shares = np.zeros((n_legs, columns.size))
    np.add.at(shares, leg_of[first], per_cell)
    shares = np.maximum(shares, 0.0)
    return LegShares(shares=shares, zones=tuple(model.event_names[c] for c in columns),
                     p_incident=float(shares.sum()))


@dataclass(frozen=True)
class FailurePath:
    """One of the likeliest ways a policy ends in a zone.

    Attributes
    ----------
    zone : the zone it ends in.
    probability : the probability of exactly this sequence of cells and ending.
    states : int64, the cells from the start, the last one the cell the run ended from.
    off_policy : indices ``i`` of the moves ``states[i] -> states[i + 1]`` (or, for the
        last, into the zone) that were not the policy's most likely landing: where noise,
        slip or drift acted.
    """

    zone: str
    probability: float
    states: np.ndarray
    off_policy: tuple[int, ...]


def failure_paths(model: Model, greedy: np.ndarray, epsilon: float, *, k: int = 3,
                  zones=None) -> list[FailurePath]:
    """The ``k`` most probable paths from the start into each zone that ends the run.

    Parameters
    ----------
    model : the model.
    greedy : int ``(n_states,)`` the policy.
    epsilon : execution noise in [0, 1).
    k : paths per zone.
    zones : names of the zones to look at (default: every zone some run can end in).

    Returns
    -------
    list of :class:`FailurePath`: zones by falling P(ending there), most probable path
    first within a zone; zones below ``PATH_ZONE_FLOOR`` or ``PATH_ZONE_SHARE`` of the
    total are left out.
    """
    import networkx as nx

    if not (isinstance(k, int) and 1 <= k <= 50):
        raise SettingsError(f"k must be a whole number in [1, 50], got {k!r}")
    chain = policy_chain(model, epsilon_greedy(greedy, model.n_actions, epsilon))
    ends = reaches_absorption(chain, model.active)
    e_start = np.zeros(model.n_states)
    e_start[model.start] = 1.0
    visits, _ = solve_transient(chain, e_start, ends, transpose=True)
    keep = visits > PATH_VISIT_FLOOR
    t = chain.transient.tocoo()
    graph = nx.DiGraph()
    sel = keep[t.row] & keep[t.col] & (t.data > 0)
    graph.add_weighted_edges_from(zip(t.row[sel].tolist(), t.col[sel].tolist(), (-np.log(t.data[sel])).tolist(),
                                      strict=True))
    absorb = chain.absorb.tocoo()
    names = model.event_names
    wanted = None if zones is None else set(zones)
    targets = {}
    for s, e, p in zip(absorb.row.tolist(), absorb.col.tolist(), absorb.data.tolist(), strict=True):
        if e < EVENT_BOUNDARY or p <= 0 or not keep[s] or (wanted is not None and names[e] not in wanted):
            continue
        node = ("zone", names[e])
        targets[names[e]] = node
        graph.add_edge(s, node, weight=-math.log(p))
    # Zones worth explaining: those a run from the start ends in often enough.
    p_zone = _ends_by_zone(model, chain, ends)
    floor = max(PATH_ZONE_FLOOR, PATH_ZONE_SHARE * sum(p for e, p in enumerate(p_zone.values()) if e >= EVENT_BOUNDARY))
    likeliest = _likeliest_landing(model, greedy)
    out = []
    for zone, node in sorted(targets.items(), key=lambda item: -p_zone[item[0]]):
        if p_zone[zone] < floor:
            continue
        if model.start not in graph:
            break
        try:
            found = nx.shortest_simple_paths(graph, model.start, node, weight="weight")
            for _, path in zip(range(k), found, strict=False):
                weight = sum(graph[a][b]["weight"] for a, b in zip(path[:-1], path[1:], strict=True))
                cells = np.array(path[:-1], dtype=np.int64)
                off = tuple(i for i in range(cells.size - 1) if likeliest[cells[i]] != cells[i + 1])
                if likeliest[cells[-1]] != -1:
                    off += (cells.size - 1,)
                out.append(FailurePath(zone=zone, probability=math.exp(-weight), states=cells, off_policy=off))
        except nx.NetworkXNoPath:
            continue
    return out


def _ends_by_zone(model: Model, chain, ends) -> dict[str, float]:
    """P(the run from the start ends in each zone)."""
    b = chain.absorb.toarray()
    x, _ = solve_transient(chain, b, ends)
    return {name: float(x[model.start, e]) for e, name in enumerate(model.event_names)}


def _likeliest_landing(model: Model, greedy: np.ndarray) -> np.ndarray:
    """Per state, the most probable next cell of its greedy action.

    -1 when that outcome ends the run; ties go to the outcome listed first, which only
    labels a move.
    """
    out = np.full(model.n_states, -1, dtype=np.int64)
    for s in np.flatnonzero(model.active):
        k = s * model.n_actions + int(greedy[s])
        lo, hi = model.offsets[k], model.offsets[k + 1]
        if hi > lo:
            j = lo + int(np.argmax(model.prob[lo:hi]))
            out[s] = int(model.next_state[j]) if model.event[j] == 0 else -1
    return out


def legs_of_route(route) -> np.ndarray:
    """The leg of each cell of a route's cell path.

    Leg ``j`` runs from waypoint ``j`` to waypoint ``j + 1`` (waypoints are cells of the
    path; the last cell joins the last leg).
    """
    path = np.asarray(route.path_m, dtype=float)
    marks = np.zeros(len(path), dtype=np.int64)
    at = 0
    for w in route.waypoints[1:-1]:
        hit = np.flatnonzero(np.all(np.isclose(path[at:], (w.east_m, w.north_m), atol=1e-6), axis=1))
        if hit.size:
            at += int(hit[0])
            marks[at] += 1
    return np.minimum(np.cumsum(marks), max(0, len(route.waypoints) - 2))


__all__ = ["FailurePath", "LegShares", "failure_paths", "leg_shares", "legs_of_route"]
