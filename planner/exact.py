"""Exact references: value iteration on the model, and how close the learners came.

This stage owns the two fixed points the learners aim at, computed on the very
outcome table they sample from: the optimal Q (:func:`optimal_q`, Q-learning's limit)
and the epsilon-greedy on-policy fixed point (:func:`on_policy_q`, SARSA's limit at a
fixed epsilon). Ties among equally good actions are broken by safety in
:mod:`planner.ties`; how close a learned policy came is judged in :mod:`planner.verdict`.

Value iteration runs as in-place (Gauss-Seidel) sweeps in a numba kernel, alternating
the sweep direction so values travel across the grid in few sweeps; the residual
reported is that of one full synchronous Bellman update of the final values.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from planner import checks
from planner.errors import SolverError
from planner.model import (
    EVENT_NONE,
    Model,
)

#: Default cap on value-iteration sweeps.
DEFAULT_MAX_ITER = 20_000
#: Exact Q values within ``ACTION_TOLERANCE * max(1, |best|)`` of the best count as tied.
ACTION_TOLERANCE = 1e-6
#: States with expected visits at most this are not "visited" by a policy.
VISIT_FLOOR = 1e-12
#: When the policy can loop forever from the start, occupancy is discounted by this
#: factor per move so that it stays finite.
LOOP_DISCOUNT = 0.999


@dataclass(frozen=True)
class ExactSolution:
    """A fixed point of value iteration on a model.

    Attributes
    ----------
    q : float64 ``(n_states, n_actions)``; rows of inactive states are 0. States from
        which no action sequence can ever end the run have ``-inf`` (and so does any
        action that may lead into them).
    v : float64 ``(n_states,)``: ``max_a q`` for the optimum, or
        ``(1 - epsilon) max_a q + epsilon mean_a q`` for the on-policy fixed point.
    epsilon : 0 for the optimum, else the execution noise of the fixed point.
    gamma : discount used.
    iterations : sweeps made.
    residual : largest absolute change of one synchronous Bellman update of ``v``.
    converged : ``residual <= tol`` (always true for a returned solution).
    """

    q: np.ndarray
    v: np.ndarray
    epsilon: float
    gamma: float
    iterations: int
    residual: float
    converged: bool


def optimal_q(model: Model, *, gamma: float = 1.0, tol: float = 1e-9, max_iter: int = DEFAULT_MAX_ITER) -> ExactSolution:
    """Optimal Q by value iteration: ``V(s) = max_a Q(s, a)``.

    ``Q(s, a) = sum_o p_o (r_o + gamma [o continues] V(next_o))``.

    Parameters
    ----------
    model : the model.
    gamma : discount in (0, 1].
    tol : largest change of a synchronous Bellman update accepted as converged.
    max_iter : cap on sweeps.

    Returns
    -------
    ExactSolution with ``epsilon`` 0.

    Raises
    ------
    SolverError
        When the residual is still above ``tol`` after ``max_iter`` sweeps.
    """
    return _solve(model, 0.0, gamma, tol, max_iter)


def on_policy_q(model: Model, epsilon: float, *, gamma: float = 1.0, tol: float = 1e-9,
                max_iter: int = DEFAULT_MAX_ITER, warm: np.ndarray | None = None) -> ExactSolution:
    """The epsilon-greedy on-policy fixed point by value iteration.

    ``V(s) = (1 - epsilon) max_a Q(s, a) + epsilon mean_a Q(s, a)``: the value of
    acting greedily on Q with probability ``1 - epsilon`` and uniformly otherwise, the
    same execution noise as :func:`planner.model.epsilon_greedy`.

    Parameters
    ----------
    model : the model.
    epsilon : execution noise in [0, 1] (0 gives :func:`optimal_q`).
    gamma : discount in (0, 1].
    tol : largest change of a synchronous Bellman update accepted as converged.
    max_iter : cap on sweeps.
    warm : optional float ``(n_states,)`` values to start from (e.g. the ``v`` of a
        solution on the same grid with a nearby penalty); default the deterministic
        cost to go.

    Returns
    -------
    ExactSolution

    Raises
    ------
    SolverError
        When the residual is still above ``tol`` after ``max_iter`` sweeps.
    """
    checks.probability(epsilon, "epsilon")
    return _solve(model, float(epsilon), gamma, tol, max_iter, warm)


def _solve(model: Model, epsilon: float, gamma: float, tol: float, max_iter: int,
           warm: np.ndarray | None = None) -> ExactSolution:
    checks.number(gamma, "gamma", low=0.0, high=1.0, low_open=True)
    checks.number(tol, "tol", low=0.0, low_open=True, says="a positive number")
    checks.whole(max_iter, "max_iter", low=1)
    from planner.learn_paths import model_cost_to_go

    n_s, n_a = model.n_states, model.n_actions
    escapes = _can_end(model)
    v = np.zeros(n_s)
    if warm is not None:
        v[:] = np.where(np.isfinite(warm), warm, 0.0)
    else:
        # Start from the deterministic cost to go: close to the answer on most grids.
        start_cost = model_cost_to_go(model)
        finite = np.isfinite(start_cost) & model.active
        v[finite] = -start_cost[finite]
    v[model.active & ~escapes] = -np.inf
    orders = _sweep_orders(model, model.active & escapes)
    iterations, residual = _value_iteration(model.table(), n_a, float(gamma), epsilon, float(tol), int(max_iter),
                                            orders, v)
    if not residual <= tol:
        raise SolverError(
            f"value iteration (epsilon {epsilon:g}) did not converge in {max_iter} sweeps: residual {residual:.3e} "
            f"> tol {tol:.0e}"
        )
    q = _q_from_v(model.table(), n_a, float(gamma), v, model.active).reshape(n_s, n_a)
    return ExactSolution(q=q, v=v, epsilon=epsilon, gamma=float(gamma), iterations=int(iterations),
                         residual=float(residual), converged=True)


def _sweep_orders(model: Model, sweepable: np.ndarray) -> np.ndarray:
    """Four raster orders of the sweepable states (row-major and column-major, both ways)."""
    rows, cols = np.unravel_index(np.arange(model.n_states), model.shape)
    orders = (np.lexsort((cols, rows)), np.lexsort((-cols, -rows)), np.lexsort((rows, cols)),
              np.lexsort((-rows, -cols)))
    return np.stack([o[sweepable[o]] for o in orders]).astype(np.int64)


def _can_end(model: Model) -> np.ndarray:
    """States from which some sequence of actions ends the run with positive probability."""
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import breadth_first_order

    n_s, n_a = model.n_states, model.n_actions
    counts = np.diff(model.offsets)
    src = np.repeat(np.arange(n_s * n_a, dtype=np.int64), counts) // n_a
    going = model.event == EVENT_NONE
    # Reversed graph, with node n_s linked to every state that has an ending outcome.
    ending_src = np.unique(src[~going])
    rows = np.concatenate([model.next_state[going].astype(np.int64), np.full(ending_src.size, n_s)])
    cols = np.concatenate([src[going], ending_src])
    graph = csr_matrix((np.ones(rows.size, np.int8), (rows, cols)), shape=(n_s + 1, n_s + 1))
    order = breadth_first_order(graph, n_s, directed=True, return_predecessors=False)
    out = np.zeros(n_s + 1, dtype=bool)
    out[order] = True
    return out[:n_s] & model.active


@numba.njit(cache=True, inline="always")
def _action_value(t, gamma, v, k):
    """One Bellman backup of the (state, action) block ``k``."""
    qa = 0.0
    for j in range(t.offsets[k], t.offsets[k + 1]):
        if t.event[j] == EVENT_NONE:
            qa += t.prob[j] * (t.reward[j] + gamma * v[t.next_state[j]])
        else:
            qa += t.prob[j] * t.reward[j]
    return qa


@numba.njit(cache=True)
def _state_value(t, n_actions, gamma, epsilon, v, s):
    best = -np.inf
    total = 0.0
    for a in range(n_actions):
        qa = _action_value(t, gamma, v, s * n_actions + a)
        if qa > best:
            best = qa
        total += qa
    return (1.0 - epsilon) * best + epsilon * total / n_actions


@numba.njit(cache=True)
def _value_iteration(t, n_actions, gamma, epsilon, tol, max_iter, orders, v):
    """Value iteration in place; returns (sweeps, residual).

    Sweeps until one sweep changes no value by more than ``tol`` and a synchronous
    Bellman update confirms it.
    """
    n_orders = orders.shape[0]
    residual = np.inf
    sweeps = 0
    fresh = np.empty(v.size, np.float64)
    while sweeps < max_iter:
        order = orders[sweeps % n_orders]
        change = 0.0
        for i in range(order.size):
            s = order[i]
            new = _state_value(t, n_actions, gamma, epsilon, v, s)
            old = v[s]
            v[s] = new
            if new != old:
                d = abs(new - old)
                if d > change:
                    change = d
        sweeps += 1
        if change <= tol:
            residual = 0.0
            for i in range(order.size):
                s = order[i]
                fresh[s] = _state_value(t, n_actions, gamma, epsilon, v, s)
            for i in range(order.size):
                s = order[i]
                if fresh[s] != v[s]:
                    d = abs(fresh[s] - v[s])
                    if d > residual:
                        residual = d
            if residual <= tol:
                break
        else:
            residual = change
    return sweeps, residual


@numba.njit(cache=True)
def _q_from_v(t, n_actions, gamma, v, active):
    n_s = active.size
    q = np.zeros(n_s * n_actions, np.float64)
    for s in range(n_s):
        if not active[s]:
            continue
        for a in range(n_actions):
            k = s * n_actions + a
            q[k] = _action_value(t, gamma, v, k)
    return q


def near_best(q: np.ndarray, tol: float = ACTION_TOLERANCE, *, tie_m: float = 0.0) -> np.ndarray:
    """Which actions are optimal up to round-off (and up to ``tie_m`` metres-equivalent).

    Parameters
    ----------
    q : float ``(n_states, n_actions)``, e.g. ``ExactSolution.q``.
    tol : relative tolerance: within ``tol * max(1, |best|)`` of the row's best.
    tie_m : absolute slack: actions within this many metres-equivalent of the best
        count as equally good (a detour below the grid's resolution).

    Returns
    -------
    bool ``(n_states, n_actions)``.
    """
    q = np.asarray(q, dtype=np.float64)
    best = q.max(axis=1, keepdims=True)
    with np.errstate(invalid="ignore"):
        slack = tol * np.maximum(1.0, np.abs(best)) + tie_m
        return (q >= best - slack) | (q == best)

__all__ = [
    "ACTION_TOLERANCE", "ExactSolution", "near_best", "on_policy_q", "optimal_q",
]
