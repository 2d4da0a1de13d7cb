"""Cheapest paths on a model's outcome graph, and what the learners start from.

The deterministic cost to go (:func:`model_cost_to_go`) and the fewest moves to the
goal (:func:`fewest_moves`) come from Dijkstra on the graph whose edges are a model's
possible outcomes. From them :mod:`planner.learn` derives the initial Q
(:func:`heuristic_q`), the step cap of its episodes, the corridor of its exploring
starts and the order in which a sweep updates the (state, action) blocks
(:func:`sweep_order`).
"""

from __future__ import annotations

import numpy as np

from planner.errors import SettingsError
from planner.model import Model
from planner.outcomes import EVENT_GOAL, EVENT_NONE


def _outcome_graph(model: Model):
    """Directed graph of the model: an edge per possible continuing or goal outcome.

    Node ``n_states`` stands for "goal reached". Edge weights are the outcome's cost
    (minus its reward); parallel edges keep their cheapest weight.
    """
    from scipy.sparse import csr_matrix

    n_s, n_a = model.n_states, model.n_actions
    counts = np.diff(model.offsets)
    src = np.repeat(np.arange(n_s * n_a, dtype=np.int64), counts) // n_a
    going = model.event == EVENT_NONE
    reached = model.event == EVENT_GOAL
    keep = (going | reached) & (model.next_state != src)
    dst = np.where(reached, n_s, model.next_state.astype(np.int64))[keep]
    src = src[keep]
    cost = np.maximum(-model.reward[keep], 1e-12)
    order = np.lexsort((cost, dst, src))
    src, dst, cost = src[order], dst[order], cost[order]
    first = np.ones(src.size, dtype=bool)
    first[1:] = (src[1:] != src[:-1]) | (dst[1:] != dst[:-1])
    return csr_matrix((cost[first], (src[first], dst[first])), shape=(n_s + 1, n_s + 1))


def model_cost_to_go(model: Model) -> np.ndarray:
    """Cheapest cost to the goal from each state if every move had its best outcome.

    Dijkstra on the model's outcome graph (every outcome with positive probability is
    an edge, weighted by its cost). This is the deterministic shortest-path cost of the
    model's own rewards: no run that reaches the goal costs less.

    Parameters
    ----------
    model : the model.

    Returns
    -------
    float64 ``(n_states,)``: 0 on goal cells, ``inf`` where the goal is unreachable and
    on the other inactive cells (hazards that end the run, outside the boundary).

    Examples
    --------
    >>> import numpy as np
    >>> from planner.grid import grid_from_arrays
    >>> from planner.model import Dynamics, build_model
    >>> goal = np.zeros((1, 4), bool); goal[0, 3] = True
    >>> m = build_model(grid_from_arrays(np.full((1, 4), -1), goal=goal, start=(0, 0)),
    ...                 Dynamics(n_actions=4, slip=0.0, edge="wall", step_cost="move"))
    >>> model_cost_to_go(m)[:3].tolist()
    [3.0, 2.0, 1.0]
    """
    from scipy.sparse.csgraph import dijkstra

    graph = _outcome_graph(model)
    cost = dijkstra(graph.T.tocsr(), directed=True, indices=model.n_states)[: model.n_states]
    cost[~model.active] = np.inf
    cost[model.goal] = 0.0
    return cost


def fewest_moves(model: Model) -> float:
    """Fewest moves from the start to the goal if every move had its best outcome.

    Parameters
    ----------
    model : the model.

    Returns
    -------
    float, ``inf`` when no sequence of outcomes reaches the goal.
    """
    from scipy.sparse.csgraph import dijkstra

    graph = _outcome_graph(model)
    return float(dijkstra(graph, directed=True, indices=model.start, unweighted=True)[model.n_states])



def cost_from_start(model: Model) -> np.ndarray:
    """Cheapest cost from the start to each state if every move had its best outcome.

    Returns
    -------
    float64 ``(n_states,)``, ``inf`` where no sequence of outcomes leads.
    """
    from scipy.sparse.csgraph import dijkstra

    return dijkstra(_outcome_graph(model), directed=True, indices=model.start)[: model.n_states]


def checked_cost_to_go(model: Model, cost_to_go) -> np.ndarray:
    """``cost_to_go`` as float64 ``(n_states,)``, refused unless it fits the model and is >= 0."""
    cost = np.asarray(cost_to_go, dtype=np.float64).ravel()
    if cost.size != model.n_states:
        raise SettingsError(f"cost_to_go has {cost.size} entries, the model has {model.n_states} states")
    if np.any(np.isnan(cost)) or np.any(cost < 0):
        raise SettingsError("cost_to_go must be >= 0 (inf where the goal is unreachable), with no NaN")
    return cost


def heuristic_q(model: Model, cost_to_go) -> np.ndarray:
    """Initial Q from a deterministic cost-to-go: one exact step, then the heuristic.

    ``Q(s, a) = sum_o p_o (r_o + [o continues] * (-cost_to_go[next_o]))``: an outcome
    that ends the run contributes only its reward; a continuing outcome into a cell
    whose cost to go is ``inf`` (the goal is unreachable from there) is valued at minus
    the model's boundary penalty, the cost the model puts on giving up a run. The
    heuristic is undiscounted whatever ``gamma`` the learner uses.

    Parameters
    ----------
    model : the model.
    cost_to_go : float ``(n_states,)`` or grid-shaped, in the model's reward units
        (metres-equivalent), e.g. ``planner.grid.cost_to_goal(grid, n_actions)`` or
        :func:`model_cost_to_go`.

    Returns
    -------
    float64 ``(n_states, n_actions)``; rows of inactive states are 0.
    """
    cost = checked_cost_to_go(model, cost_to_go)
    n_s, n_a = model.n_states, model.n_actions
    counts = np.diff(model.offsets)
    pair = np.repeat(np.arange(n_s * n_a, dtype=np.int64), counts)
    going = model.event == EVENT_NONE
    after = cost[np.where(going, model.next_state, 0)]
    after = np.where(np.isfinite(after), -after, -model.boundary_penalty_m)
    value = model.prob * (model.reward + np.where(going, after, 0.0))
    return np.bincount(pair, weights=value, minlength=n_s * n_a).reshape(n_s, n_a)


def sweep_order(model: Model, cost_to_go: np.ndarray) -> np.ndarray:
    """The (state, action) blocks a sweep updates, in the order it updates them.

    Every action of every active state from which the goal can be reached, states in
    increasing cost to go (nearest the goal first, so that one sweep carries values
    along a whole route), actions in index order within a state.

    Returns
    -------
    int64 ``(n_pairs,)`` flat block indices ``s * n_actions + a``.
    """
    cost = checked_cost_to_go(model, cost_to_go)
    ok = model.active & np.isfinite(cost) & ~model.goal
    states = np.flatnonzero(ok)
    states = states[np.argsort(cost[states], kind="stable")]
    return (states[:, None] * model.n_actions + np.arange(model.n_actions)[None, :]).ravel().astype(np.int64)



__all__ = ["checked_cost_to_go", "cost_from_start", "fewest_moves", "heuristic_q", "model_cost_to_go", "sweep_order"]
