"""Exact references: value iteration on the model, and how close the learners came.

This stage owns the two fixed points the learners aim at, computed on the very
outcome table they sample from: the optimal Q (:func:`optimal_q`, Q-learning's limit)
and the epsilon-greedy on-policy fixed point (:func:`on_policy_q`, SARSA's limit at a
fixed epsilon), plus the convergence report (:func:`convergence_report`) that compares
a learned consensus policy with its reference under the policy's own execution noise.

Value iteration runs as in-place (Gauss-Seidel) sweeps in a numba kernel, alternating
the sweep direction so values travel across the grid in few sweeps; the residual
reported is that of one full synchronous Bellman update of the final values.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np

from planner.errors import SettingsError, SolverError
from planner.model import (
    EVENT_NONE,
    Chain,
    Model,
    epsilon_greedy,
    policy_chain,
    reaches_absorption,
    reaching,
    solve_transient,
)
from planner.route import nominal_path

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
                max_iter: int = DEFAULT_MAX_ITER) -> ExactSolution:
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

    Returns
    -------
    ExactSolution

    Raises
    ------
    SolverError
        When the residual is still above ``tol`` after ``max_iter`` sweeps.
    """
    if not (_is_number(epsilon) and 0.0 <= epsilon <= 1.0):
        raise SettingsError(f"--epsilon must be a number in [0, 1], got {epsilon!r}")
    return _solve(model, float(epsilon), gamma, tol, max_iter)


def _is_number(value) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool) \
        and math.isfinite(value)


def _solve(model: Model, epsilon: float, gamma: float, tol: float, max_iter: int) -> ExactSolution:
    if not (_is_number(gamma) and 0.0 < gamma <= 1.0):
        raise SettingsError(f"--gamma must be a number in (0, 1], got {gamma!r}")
    if not (_is_number(tol) and tol > 0):
        raise SettingsError(f"tol must be a positive number, got {tol!r}")
    if not (isinstance(max_iter, (int, np.integer)) and not isinstance(max_iter, bool) and max_iter >= 1):
        raise SettingsError(f"max_iter must be a whole number >= 1, got {max_iter!r}")
    from planner.learn import model_cost_to_go

    n_s, n_a = model.n_states, model.n_actions
    escapes = _can_end(model)
    v = np.zeros(n_s)
    # Start from the deterministic cost to go: close to the answer on most grids.
    start_cost = model_cost_to_go(model)
    finite = np.isfinite(start_cost) & model.active
    v[finite] = -start_cost[finite]
    v[model.active & ~escapes] = -np.inf
    rows, cols = np.unravel_index(np.arange(n_s), model.shape)
    sweepable = model.active & escapes
    orders = np.stack([
        np.lexsort((cols, rows)), np.lexsort((-cols, -rows)), np.lexsort((rows, cols)), np.lexsort((-rows, -cols)),
    ])
    orders = np.stack([o[sweepable[o]] for o in orders]).astype(np.int64)
    iterations, residual = _value_iteration(
        model.offsets, model.next_state, model.prob, model.reward, model.event, n_a, float(gamma), epsilon,
        float(tol), int(max_iter), orders, v,
    )
    if not residual <= tol:
        raise SolverError(
            f"value iteration (epsilon {epsilon:g}) did not converge in {max_iter} sweeps: residual {residual:.3e} "
            f"> tol {tol:.0e}"
        )
    q = _q_from_v(model.offsets, model.next_state, model.prob, model.reward, model.event, n_a, float(gamma), v,
                  model.active).reshape(n_s, n_a)
    return ExactSolution(q=q, v=v, epsilon=epsilon, gamma=float(gamma), iterations=int(iterations),
                         residual=float(residual), converged=True)


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
def _action_value(offsets, next_state, prob, reward, event, gamma, v, k):
    """One Bellman backup of the (state, action) block ``k``."""
    qa = 0.0
    for j in range(offsets[k], offsets[k + 1]):
        if event[j] == 0:
            qa += prob[j] * (reward[j] + gamma * v[next_state[j]])
        else:
            qa += prob[j] * reward[j]
    return qa


@numba.njit(cache=True)
def _state_value(offsets, next_state, prob, reward, event, n_actions, gamma, epsilon, v, s):
    best = -np.inf
    total = 0.0
    for a in range(n_actions):
        qa = _action_value(offsets, next_state, prob, reward, event, gamma, v, s * n_actions + a)
        if qa > best:
            best = qa
        total += qa
    return (1.0 - epsilon) * best + epsilon * total / n_actions


@numba.njit(cache=True)
def _value_iteration(offsets, next_state, prob, reward, event, n_actions, gamma, epsilon, tol, max_iter, orders, v):
    """In-place sweeps until one sweep changes no value by more than ``tol`` and a
    synchronous Bellman update confirms it; returns (sweeps, residual)."""
    n_orders = orders.shape[0]
    residual = np.inf
    sweeps = 0
    fresh = np.empty(v.size, np.float64)
    while sweeps < max_iter:
        order = orders[sweeps % n_orders]
        change = 0.0
        for i in range(order.size):
            s = order[i]
            new = _state_value(offsets, next_state, prob, reward, event, n_actions, gamma, epsilon, v, s)
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
                fresh[s] = _state_value(offsets, next_state, prob, reward, event, n_actions, gamma, epsilon, v, s)
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
def _q_from_v(offsets, next_state, prob, reward, event, n_actions, gamma, v, active):
    n_s = active.size
    q = np.zeros(n_s * n_actions, np.float64)
    for s in range(n_s):
        if not active[s]:
            continue
        for a in range(n_actions):
            k = s * n_actions + a
            q[k] = _action_value(offsets, next_state, prob, reward, event, gamma, v, k)
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


# ----------------------------------------------------------------------------- convergence report


@dataclass(frozen=True)
class Convergence:
    """How close a learned consensus policy is to its exact reference.

    Attributes
    ----------
    agreement : occupancy-weighted fraction of visited states where the learned
        greedy action is optimal for the reference (actions within
        ``ACTION_TOLERANCE`` of the best reference Q count as optimal).
    value_gap_m : reference V at the start minus the learned greedy policy's V at the
        start, both under the reference's noise (``inf`` when the learned policy can
        loop forever from the start).
    learned_value_m, reference_value_m : the two values behind the gap.
    seed_routes_matching : seeds whose greedy nominal route ends the same way as the
        consensus one and keeps within two cells of it (see :func:`same_corridor`).
    seeds_agreeing : seeds whose own greedy policy reaches ``threshold`` agreement on
        the states the consensus policy visits (ties make routes differ harmlessly;
        this count does not mind them).
    n_seeds : seeds trained.
    visited_states : states the consensus policy visits (occupancy above ``VISIT_FLOOR``).
    converged : ``agreement >= threshold`` and a value gap of at most ``gap_limit_m``
        (the consensus policy is what is exported; single seeds are only reported).
    message : one plain sentence for the briefing and the summary.
    """

    agreement: float
    value_gap_m: float
    learned_value_m: float
    reference_value_m: float
    seed_routes_matching: int
    seeds_agreeing: int
    n_seeds: int
    visited_states: int
    converged: bool
    message: str


def policy_value(model: Model, greedy: np.ndarray, epsilon: float) -> tuple[float, Chain, np.ndarray]:
    """Exact value at the start of ``greedy`` executed with noise ``epsilon``.

    Parameters
    ----------
    model : the model.
    greedy : int ``(n_states,)`` greedy action per state.
    epsilon : execution noise in [0, 1].

    Returns
    -------
    (value, chain, finite): the expected return from the start (``-inf`` when the run
    may never end from there), the :class:`planner.model.Chain`, and the bool mask of
    states whose value is finite (from them the run ends with probability 1).
    """
    chain = policy_chain(model, epsilon_greedy(greedy, model.n_actions, epsilon))
    ends = reaches_absorption(chain, model.active)
    trapped = model.active & ~ends
    finite = ends & ~reaching(chain.transient, trapped)
    if not finite[model.start]:
        return -math.inf, chain, finite
    v, _ = solve_transient(chain, chain.reward, finite)
    return float(v[model.start]), chain, finite


def occupancy(model: Model, chain: Chain, finite: np.ndarray) -> np.ndarray:
    """Expected visits to each state from the start: ``(I - T^T) x = e_start``.

    When the run may never end from the start (``finite[start]`` false) the visits
    are discounted by ``LOOP_DISCOUNT`` per move so that they stay finite.

    Parameters
    ----------
    model : the model.
    chain, finite : from :func:`policy_value`.

    Returns
    -------
    float64 ``(n_states,)``, expected visits (the start counts its first visit).
    """
    e_start = np.zeros(model.n_states)
    e_start[model.start] = 1.0
    if finite[model.start]:
        x, _ = solve_transient(chain, e_start, finite, transpose=True)
    else:
        damped = Chain(transient=chain.transient * LOOP_DISCOUNT, absorb=chain.absorb, reward=chain.reward,
                       move_m=chain.move_m)
        x, _ = solve_transient(damped, e_start, model.active, transpose=True)
    return np.maximum(x, 0.0)


def same_corridor(model: Model, a: np.ndarray, b: np.ndarray, cells: int = 2) -> bool:
    """Whether two cell paths keep within ``cells`` of each other (symmetric, king distance).

    Equal-cost routes that only swap the order of straight and diagonal moves differ
    cell by cell; they are the same route for a reviewer.
    """
    ra, ca = np.unravel_index(np.asarray(a), model.shape)
    rb, cb = np.unravel_index(np.asarray(b), model.shape)
    dist = np.maximum(np.abs(ra[:, None] - rb[None, :]), np.abs(ca[:, None] - cb[None, :]))
    return bool(dist.min(axis=1).max() <= cells and dist.min(axis=0).max() <= cells)


def convergence_report(model: Model, learned, reference: ExactSolution, epsilon: float, *,
                       threshold: float = 0.95, tie_m: float = 0.0, gap_limit_m: float = math.inf) -> Convergence:
    """Compare a learned consensus policy with its exact reference.

    Parameters
    ----------
    model : the model both were computed on.
    learned : a :class:`planner.learn.Learned`.
    reference : :func:`optimal_q` for Q-learning, :func:`on_policy_q` for SARSA.
    epsilon : execution noise of the policy; the occupancy weights are its expected
        visits from the start when executed with this noise.
    threshold : agreement needed to call training converged.
    tie_m : actions whose exact value is within this many metres-equivalent of the
        best count as agreeing (``plan`` uses a quarter of a cell: a detour below the
        grid's resolution is not a disagreement).
    gap_limit_m : largest value gap at the start still called converged.

    Returns
    -------
    Convergence

    Notes
    -----
    The value gap compares like with like: the learned greedy policy is evaluated
    exactly under the reference's own noise (``reference.epsilon``: 0 for the optimum),
    so the gap is >= 0 up to round-off and 0 when the learned policy is as good as the
    reference.
    """
    from planner.learn import greedy_actions

    if not (_is_number(threshold) and 0.0 < threshold <= 1.0):
        raise SettingsError(f"threshold must be in (0, 1], got {threshold!r}")
    consensus = greedy_actions(learned.q_mean)
    correct = near_best(reference.q, tie_m=tie_m)
    states = np.arange(model.n_states)

    policy_value_at_start, chain, finite = policy_value(model, consensus, epsilon)
    x = occupancy(model, chain, finite)
    visited = (x > VISIT_FLOOR) & model.active
    weight = np.where(visited, x, 0.0)
    total = weight.sum()

    def agree(greedy):
        return float((weight * correct[states, greedy]).sum() / total) if total > 0 else 0.0

    agreement = agree(consensus)
    if reference.epsilon == epsilon:
        learned_value = policy_value_at_start
    else:
        learned_value, _, _ = policy_value(model, consensus, reference.epsilon)
    reference_value = float(reference.v[model.start])
    gap = reference_value - learned_value if math.isfinite(learned_value) else math.inf

    route = nominal_path(model, consensus)
    matching, agreeing = 0, 0
    for i in range(learned.q.shape[0]):
        own = greedy_actions(learned.q[i])
        other = nominal_path(model, own)
        matching += int(other.end_event == route.end_event and same_corridor(model, other.states, route.states))
        agreeing += int(agree(own) >= threshold)
    n_seeds = int(learned.q.shape[0])
    # The exported policy is the consensus; single seeds are noisier and only reported.
    converged = agreement >= threshold and gap <= gap_limit_m
    pct = f"{100 * agreement:.0f}%"
    if converged:
        message = (f"converged: {pct} agreement with the exact solution on visited states, "
                   f"{max(gap, 0.0):.1f} m-equiv. from its value; {matching} of {n_seeds} seeds' routes "
                   "keep within 2 cells of its route")
    else:
        more = int(learned.settings.episodes * (2 if agreement >= 0.8 else 4))
        if not math.isfinite(gap):
            why = "the learned policy can loop forever from the start"
        elif agreement < threshold:
            why = f"only {pct} agreement with the exact solution on visited states"
        else:
            why = f"{gap:.1f} m-equiv. worse than the exact solution at the start (limit {gap_limit_m:.1f})"
        message = f"not converged: {why}; try --episodes {more}"
    return Convergence(
        agreement=agreement, value_gap_m=float(gap), learned_value_m=float(learned_value),
        reference_value_m=reference_value, seed_routes_matching=matching, seeds_agreeing=agreeing, n_seeds=n_seeds,
        visited_states=int(visited.sum()), converged=bool(converged), message=message,
    )


__all__ = [
    "ACTION_TOLERANCE", "Convergence", "ExactSolution", "convergence_report", "near_best", "occupancy",
    "on_policy_q", "optimal_q", "policy_value",
]
