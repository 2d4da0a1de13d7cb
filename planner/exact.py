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

import dataclasses
import math
from dataclasses import dataclass

import numba
import numpy as np

from planner.errors import SettingsError, SolverError
from planner.model import (
    EVENT_BOUNDARY,
    EVENT_GOAL,
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
    if not (_is_number(epsilon) and 0.0 <= epsilon <= 1.0):
        raise SettingsError(f"--epsilon must be a number in [0, 1], got {epsilon!r}")
    return _solve(model, float(epsilon), gamma, tol, max_iter, warm)


def _is_number(value) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool) \
        and math.isfinite(value)


def _solve(model: Model, epsilon: float, gamma: float, tol: float, max_iter: int,
           warm: np.ndarray | None = None) -> ExactSolution:
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


# ----------------------------------------------------------------------------- ties by safety

#: Default tie tolerance (metres-equivalent): actions whose exact values differ by less
#: than this are equally good. One centimetre lies far above the solvers' round-off
#: (value iteration stops at a change of 1e-9 per sweep, so values over a few thousand
#: moves are good to about 1e-6) and far below any detour a vehicle can fly or a site
#: drawing can show (sites are drawn to 1 cm).
DEFAULT_TIE_M = 0.01
#: Reachability sweeps stop when no probability changes by more than this (or after
#: ``REACH_SWEEPS``); policy improvement on exact chain solves then finishes the job, and
#: the figures reported come from those solves, not from the sweeps.
REACH_TOLERANCE = 1e-10
#: Sweeps are cheap but crawl near nearly closed loops; policy improvement on exact
#: solves converges in a few rounds from wherever they stop. Measured on the ground-robot
#: demo plan: 200 sweeps give the same policies as 2,000 in a quarter of the time.
REACH_SWEEPS = 200
#: Two actions whose P(incident) from a state differ by less than this are equally safe.
SAFETY_TIE = 1e-12
#: Policy-improvement rounds on exact solves after the sweeps (each normally confirms).
MAX_IMPROVEMENTS = 20


def equally_good(q: np.ndarray, tie_m: float = DEFAULT_TIE_M) -> np.ndarray:
    """The near-optimal action set of every state: actions within ``tie_m`` of the best.

    Parameters
    ----------
    q : float ``(n_states, n_actions)``, a fixed point (``ExactSolution.q``) or a
        learned mean Q.
    tie_m : tolerance in metres-equivalent (>= 0); round-off ties (see
        :func:`near_best`) always count.

    Returns
    -------
    bool ``(n_states, n_actions)``; every row has at least one True.
    """
    if not (_is_number(tie_m) and tie_m >= 0):
        raise SettingsError(f"tie_m must be a number of metres-equivalent >= 0, got {tie_m!r}")
    return near_best(q, tie_m=float(tie_m))


@dataclass(frozen=True)
class SafestChoice:
    """How the ties of a fixed point are broken: by safety, with the range they span.

    Attributes
    ----------
    greedy : int64 ``(n_states,)``, the delivered policy: in every state, among the
        allowed (equally good) actions, one that minimises P(incident) from there when
        the policy is executed with noise ``epsilon``; among equally safe ones the one of
        higher value, then any (they give the same figures).
    riskiest : int64 ``(n_states,)``, the same with P(incident) maximised.
    p_incident : exact P(incident) from the start of ``greedy`` (the low end).
    p_incident_max : exact P(incident) from the start of ``riskiest`` (the high end).
    expected_m : expected metres travelled from the start until the run ends, under
        ``greedy`` with noise ``epsilon`` (``inf`` when it may never end).
    value : the expected return from the start of ``greedy`` with noise ``epsilon``
        under the model's own rewards (``-inf`` when it may never end).
    n_tied_states : active states with more than one allowed action.
    epsilon : the execution noise of the secondary problem.
    improvements : policy-improvement rounds on exact solves (both ends together).
    """

    greedy: np.ndarray
    riskiest: np.ndarray
    p_incident: float
    p_incident_max: float
    expected_m: float
    value: float
    n_tied_states: int
    epsilon: float
    improvements: int


def incident_from_every_state(model: Model, greedy: np.ndarray, epsilon: float, *,
                              check: bool = True) -> np.ndarray:
    """Exact P(incident) from every state for ``greedy`` executed with noise ``epsilon``.

    Incident means the run ends in a hazard that ends it or off the boundary
    (events from ``EVENT_BOUNDARY`` on). States from which the run never ends have 0.

    ``check=False`` skips the residual test of the solve (for intermediate policies
    of an improvement loop, which may hold near-closed loops; reported figures are
    always checked).

    Returns
    -------
    float64 ``(n_states,)``; 0 on inactive states.
    """
    chain = policy_chain(model, epsilon_greedy(greedy, model.n_actions, epsilon))
    return _incident(model, chain, check=check)


def _incident(model: Model, chain: Chain, *, check: bool = True, first: int = EVENT_BOUNDARY,
              last: int | None = None) -> np.ndarray:
    """P(the run ends with an event in ``first:last``) from every state (default: an incident)."""
    ends = reaches_absorption(chain, model.active)
    b = np.asarray(chain.absorb[:, first:last].sum(axis=1)).ravel()
    x = np.zeros(model.n_states)
    if ends.any():
        x, _ = solve_transient(chain, b, ends, check=check)
    return np.clip(np.nan_to_num(x, nan=0.0), 0.0, 1.0)


def expected_metres(model: Model, greedy: np.ndarray, epsilon: float) -> float:
    """Expected metres travelled from the start until the run ends (``inf`` if it may not)."""
    chain = policy_chain(model, epsilon_greedy(greedy, model.n_actions, epsilon))
    return _expected_metres(model, chain)


def _expected_metres(model: Model, chain: Chain) -> float:
    return _expected_metres_and_value(model, chain)[0]


def _expected_metres_and_value(model: Model, chain: Chain) -> tuple[float, float]:
    """Expected metres until the run ends and expected return, from the start (one solve)."""
    ends = reaches_absorption(chain, model.active)
    finite = ends & ~reaching(chain.transient, model.active & ~ends)
    if not finite[model.start]:
        return math.inf, -math.inf
    x, _ = solve_transient(chain, np.column_stack([chain.move_m, chain.reward]), finite)
    return float(x[model.start, 0]), float(x[model.start, 1])


def safest_among(model: Model, allowed: np.ndarray, epsilon: float, *, value: np.ndarray | None = None,
                 riskiest: bool = True, tol: float = REACH_TOLERANCE,
                 max_iter: int = REACH_SWEEPS) -> SafestChoice:
    """Break the ties of an action set by safety: lexicographic optimisation, solved exactly.

    The primary criterion has already made ``allowed`` (e.g. :func:`equally_good` of a
    fixed point). Restricted to those actions, the secondary problem is solved for the
    policy executed with noise ``epsilon`` (greedy action with probability
    ``1 - epsilon``, uniformly random otherwise). The safest policy maximises P(the run
    ends at the goal): where every allowed choice ends the run (true of the ties of a
    fixed point with positive move costs), that is the least P(incident), and a choice
    that would loop for ever counts as a failure, not as safety. The riskiest maximises
    P(incident). Each is solved by reachability value iteration, ``u(s) = max over
    allowed a of (1 - epsilon) R(s, a) + epsilon mean_b R(s, b)``, ``R(s, a) = sum_o p_o
    ([o is a target event] + [o goes on] u(next_o))``, from ``u = 0`` (the least fixed
    point, which is the optimum of a reachability problem), then policy improvement on
    exact chain solves until a policy repeats; the best policy met is kept.

    Parameters
    ----------
    model : the model.
    allowed : bool ``(n_states, n_actions)``; every active row needs a True.
    epsilon : execution noise in [0, 1).
    value : optional float ``(n_states, n_actions)`` (the fixed point's Q) to choose
        between equally safe actions by value.
    riskiest : also solve the maximising problem (the high end of the range); without
        it ``riskiest`` and ``p_incident_max`` repeat the safest policy's.
    tol : the sweeps stop at a change below this ...
    max_iter : ... or after this many sweeps; exact policy improvement follows.

    Returns
    -------
    SafestChoice

    Raises
    ------
    SolverError
        When policy improvement has not settled after ``MAX_IMPROVEMENTS`` rounds.

    Notes
    -----
    Every allowed action must keep the policy proper (the run ends with probability 1),
    as near-optimal actions of a fixed point with positive move costs do whenever the
    tolerance is below the cost of the cheapest move; see :func:`check_tie_tolerance`.
    """
    n_s, n_a = model.n_states, model.n_actions
    allowed = np.asarray(allowed, dtype=bool)
    if allowed.shape != (n_s, n_a):
        raise SettingsError(f"allowed must have shape {(n_s, n_a)}, got {allowed.shape}")
    if not (_is_number(epsilon) and 0.0 <= epsilon < 1.0):
        raise SettingsError(f"epsilon must be a number in [0, 1), got {epsilon!r}")
    active = model.active
    if not allowed[active].any(axis=1).all():
        raise SettingsError("every active state needs at least one allowed action")
    flat = np.ascontiguousarray(allowed.reshape(-1))
    rank = np.zeros(n_s * n_a) if value is None else np.nan_to_num(
        np.asarray(value, dtype=np.float64).reshape(-1), nan=-np.inf, posinf=np.inf, neginf=-np.inf)
    orders = _sweep_orders(model, active & _can_end(model))
    rounds = 0
    # Safest: the most likely to reach the goal (so a loop that never ends counts as a
    # failure, not as safety); riskiest: the most likely to end in an incident.
    targets = (EVENT_GOAL, EVENT_BOUNDARY) if riskiest else (EVENT_GOAL,)
    picks = []
    for target in targets:
        u = np.zeros(n_s)
        # The sweeps only need to get close: policy improvement on exact solves finishes
        # the job (and copes with near-closed loops, where sweeps crawl).
        _reach_iteration(model.table(), target, n_a, float(epsilon),
                         flat, -1.0, float(tol), int(max_iter), orders, u)
        greedy = _pick(model.table(), target, n_a, flat, -1.0, u,
                       rank, active, np.full(n_s, -1, np.int64))
        best, best_value, seen = None, -np.inf, set()
        for _ in range(MAX_IMPROVEMENTS):
            rounds += 1
            chain = policy_chain(model, epsilon_greedy(greedy, n_a, epsilon))
            if target == EVENT_GOAL:
                u = _incident(model, chain, check=False, first=EVENT_GOAL, last=EVENT_GOAL + 1)
            else:
                u = _incident(model, chain, check=False)
            if u[model.start] > best_value:
                best, best_value = (greedy, chain), float(u[model.start])
            seen.add(greedy.tobytes())
            greedy = _pick(model.table(), target, n_a, flat, -1.0, u,
                           rank, active, greedy)
            if greedy.tobytes() in seen:
                break
        picks.append(best)
    # Every reported figure of a policy comes from one chain (one factorisation, checked).
    (safe, safe_chain), (risky, risky_chain) = picks[0], picks[-1]
    s0 = model.start
    p_safe = float(_incident(model, safe_chain)[s0])
    p_risky = p_safe if risky is safe else float(_incident(model, risky_chain)[s0])
    metres, value = _expected_metres_and_value(model, safe_chain)
    return SafestChoice(
        greedy=safe, riskiest=risky, p_incident=p_safe, p_incident_max=p_risky, expected_m=metres, value=value,
        n_tied_states=int((allowed[active].sum(axis=1) > 1).sum()), epsilon=float(epsilon), improvements=rounds,
    )


def check_tie_tolerance(model: Model, tie_m: float, setting: str = "tie_m") -> None:
    """Refuse a tie tolerance that could let equally good actions go round in a loop.

    A loop of near-optimal moves costs at most ``tie_m`` per move, so a tolerance below
    the cheapest move's cost rules loops out and every tie-break stays a proper policy.
    """
    cheapest = float(-model.reward[model.event == EVENT_NONE].max(initial=-math.inf))
    if not (_is_number(tie_m) and 0.0 <= tie_m):
        raise SettingsError(f"{setting} must be a number of metres-equivalent >= 0, got {tie_m!r}")
    if math.isfinite(cheapest) and tie_m >= cheapest:
        raise SettingsError(f"{setting} is {tie_m:g} m-equiv.; it must be below the cheapest move's cost "
                            f"({cheapest:.3g} m-equiv.), or equally good moves could go round in a loop")


@numba.njit(cache=True, inline="always")
def _action_reach(t, target, u, k):
    """P(the run ends with a ``target`` event: ``EVENT_GOAL``, or ``EVENT_BOUNDARY`` for any incident) after block ``k``.

    Block ``k`` is taken once, given ``u`` from every next state.
    """
    r = 0.0
    for j in range(t.offsets[k], t.offsets[k + 1]):
        e = t.event[j]
        if e == EVENT_NONE:
            r += t.prob[j] * u[t.next_state[j]]
        elif (e == EVENT_GOAL) if target == EVENT_GOAL else (e >= EVENT_BOUNDARY):
            r += t.prob[j]
    return r


@numba.njit(cache=True)
def _state_reach(t, target, n_actions, epsilon, allowed, sense, u, s):
    best = np.inf if sense > 0 else -np.inf
    total = 0.0
    for a in range(n_actions):
        k = s * n_actions + a
        r = _action_reach(t, target, u, k)
        total += r
        if allowed[k]:
            if sense > 0:
                best = min(best, r)
            else:
                best = max(best, r)
    return (1.0 - epsilon) * best + epsilon * total / n_actions


@numba.njit(cache=True)
def _reach_iteration(t, target, n_actions, epsilon, allowed, sense, tol, max_iter,
                     orders, u):
    """In-place sweeps of the restricted reachability problem; returns (sweeps, last change)."""
    n_orders = orders.shape[0]
    change = np.inf
    sweeps = 0
    while sweeps < max_iter:
        order = orders[sweeps % n_orders]
        change = 0.0
        for i in range(order.size):
            s = order[i]
            new = _state_reach(t, target, n_actions, epsilon, allowed, sense, u, s)
            d = abs(new - u[s])
            if d > change:
                change = d
            u[s] = new
        sweeps += 1
        if change <= tol:
            break
    return sweeps, change


@numba.njit(cache=True)
def _pick(t, target, n_actions, allowed, sense, u, rank, active, current):
    """Per state, the allowed action of least (``sense`` 1) or greatest (-1) ``R(s, a)``.

    Among equal ones the one of highest ``rank`` (value), then the first. Where
    ``current`` (a policy, or -1s) is already equally safe it is kept, so that policy
    improvement never swaps between actions that differ only by round-off.
    """
    n_s = active.size
    out = np.zeros(n_s, np.int64)
    r = np.empty(n_actions, np.float64)
    for s in range(n_s):
        if not active[s]:
            continue
        best = np.inf if sense > 0 else -np.inf
        for a in range(n_actions):
            k = s * n_actions + a
            r[a] = _action_reach(t, target, u, k)
            if allowed[k]:
                if sense > 0:
                    best = min(best, r[a])
                else:
                    best = max(best, r[a])
        pick = -1
        c = current[s]
        if c >= 0 and allowed[s * n_actions + c] and abs(r[c] - best) <= SAFETY_TIE:
            pick = c
        else:
            for a in range(n_actions):
                k = s * n_actions + a
                if allowed[k] and abs(r[a] - best) <= SAFETY_TIE:
                    if pick < 0 or rank[k] > rank[s * n_actions + pick]:
                        pick = a
        out[s] = pick
    return out


@dataclass(frozen=True)
class RiskVerdict:
    """Whether a learned policy's risk agrees with its exact reference.

    Attributes
    ----------
    converged : P(incident) inside the band and expected length within the share.
    p_incident : the learned policy's own exact P(incident), at the run's noise.
    reference_low, reference_high : the reference's tie range (safest and riskiest
        equally good policies).
    band_low, band_high : that range widened by ``max(rel_band, Monte Carlo 99 %
        half-width)``.
    length_m, reference_length_m : expected metres travelled until the run ends.
    seeds_low, seeds_high : range of the single seeds' own exact P(incident) (NaN
        when no seed policies were given).
    message : one plain sentence for the summary, ``risk.json`` and the briefing.
    """

    converged: bool
    p_incident: float
    reference_low: float
    reference_high: float
    band_low: float
    band_high: float
    length_m: float
    reference_length_m: float
    seeds_low: float
    seeds_high: float
    message: str


def risk_verdict(model: Model, greedy: np.ndarray, reference: SafestChoice, *, mc_halfwidth: float = 0.0,
                 seed_policies=(), seed_p_incident=None, rel_band: float = 0.10, length_share: float = 0.01,
                 fmt=None) -> RiskVerdict:
    """Judge a learned policy by its risk: converged only when it is as safe as the reference.

    Parameters
    ----------
    model : the model both policies live on.
    greedy : int ``(n_states,)``, the learned (delivered) policy.
    reference : :func:`safest_among` of the exact fixed point the learner aims at;
        its ``epsilon`` is the run's noise, at which both are evaluated.
    mc_halfwidth : half-width of the Monte Carlo 99 % interval of the learned policy's
        P(incident) (0 without rollouts).
    seed_policies : the single seeds' greedy policies, for the spread across seeds.
    seed_p_incident : their exact P(incident) at the reference's noise, when the caller
        has them already (used instead of solving ``seed_policies`` again).
    rel_band : relative widening of the reference range (10 %).
    length_share : largest relative excess of expected length still converged (1 %).
    fmt : how the message writes a probability (default: percent, 3 significant digits).

    Returns
    -------
    RiskVerdict
    """
    fmt = fmt or _pct
    eps = reference.epsilon
    chain = policy_chain(model, epsilon_greedy(greedy, model.n_actions, eps))
    p = float(_incident(model, chain)[model.start])
    length = _expected_metres(model, chain)
    lo, hi = reference.p_incident, reference.p_incident_max
    band_lo = max(0.0, lo - max(rel_band * lo, mc_halfwidth))
    band_hi = min(1.0, hi + max(rel_band * hi, mc_halfwidth))
    ref_len = reference.expected_m
    long_ok = math.isfinite(length) and length <= ref_len * (1.0 + length_share) + 1e-9
    risk_ok = band_lo - 1e-15 <= p <= band_hi + 1e-15
    if seed_p_incident is not None:
        seeds = [float(p) for p in seed_p_incident]
    else:
        seeds = [float(incident_from_every_state(model, g, eps, check=False)[model.start]) for g in seed_policies]
    seeds_lo, seeds_hi = (min(seeds), max(seeds)) if seeds else (math.nan, math.nan)
    ref = fmt(lo) if fmt(lo) == fmt(hi) else f"{fmt(lo)}, equally good routes {fmt(lo)} to {fmt(hi)}"
    if risk_ok and long_ok:
        message = f"converged: P(incident) {fmt(p)} (exact reference {ref}), {length:.1f} m (reference {ref_len:.1f} m)"
    else:
        why = f"P(incident) {fmt(p)}" + ("" if risk_ok else f" outside {fmt(band_lo)} to {fmt(band_hi)}") + \
            f" (exact reference {ref}), {length:.1f} m" + ("" if long_ok else
                                                           f", over {100 * length_share:g}% longer") + \
            f" (reference {ref_len:.1f} m)"
        message = f"NOT CONVERGED: {why}"
    if seeds:
        message += f"; single seeds {fmt(seeds_lo)} to {fmt(seeds_hi)}"
    return RiskVerdict(converged=bool(risk_ok and long_ok), p_incident=p, reference_low=lo, reference_high=hi,
                       band_low=band_lo, band_high=band_hi, length_m=float(length), reference_length_m=ref_len,
                       seeds_low=seeds_lo, seeds_high=seeds_hi, message=message)


def _pct(p: float) -> str:
    return f"{100 * p:.3g}%"


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
    verdict: RiskVerdict | None = None

    def judged_by(self, verdict: RiskVerdict, *, used: str = "", advice: str = "") -> Convergence:
        """The report with the risk verdict as its verdict.

        Converged only when the risk agrees; the action agreement stays as a
        diagnostic. ``used`` says what training took (e.g. "2.6e+06 updates"),
        ``advice`` what to try when the verdict fails.
        """
        message = f"{verdict.message}; {100 * self.agreement:.0f}% of visited states agree with the reference"
        if used:
            message += f"; {used}"
        if advice and not verdict.converged:
            message += f"; {advice}"
        return dataclasses.replace(self, converged=verdict.converged, message=message, verdict=verdict)


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
                       threshold: float = 0.95, tie_m: float = 0.0, gap_limit_m: float = math.inf,
                       greedy: np.ndarray | None = None, seed_greedy=None) -> Convergence:
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
    greedy : the delivered consensus policy (by default the seeds' mean Q with exact
        ties broken by safety at ``epsilon``; ``plan`` passes the safest among the
        learned ties).
    seed_greedy : each seed's own policy (by default its Q, ties by safety).

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
    if not (_is_number(threshold) and 0.0 < threshold <= 1.0):
        raise SettingsError(f"threshold must be in (0, 1], got {threshold!r}")
    def safest(q):
        return safest_among(model, equally_good(q), epsilon, value=q, riskiest=False).greedy

    consensus = safest(learned.q_mean) if greedy is None else np.asarray(greedy, dtype=np.int64)
    if seed_greedy is None:
        seed_greedy = [safest(q) for q in learned.q]
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
    for own in seed_greedy:
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
    "ACTION_TOLERANCE", "DEFAULT_TIE_M", "Convergence", "ExactSolution", "RiskVerdict", "SafestChoice",
    "check_tie_tolerance", "convergence_report", "equally_good", "expected_metres", "incident_from_every_state",
    "near_best", "occupancy", "on_policy_q", "optimal_q", "policy_value", "risk_verdict", "safest_among",
]
