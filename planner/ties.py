"""Ties by safety: among equally good actions, the safest, and the range chosen from.

Two actions whose exact values differ by less than a tie tolerance are equally good
(:func:`equally_good`). Among them the product takes the one that makes the run least
likely to end in a hazard when flown with the run's noise, solved over the whole grid
(:func:`safest_among`: reachability sweeps restricted to the equally good actions,
finished by policy improvement on exact chain solves), and reports the riskiest
equally good policy beside it, so the figure a reviewer signs carries its range.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np

from planner.errors import SettingsError
from planner.exact import _can_end, _is_number, _sweep_orders, near_best
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


__all__ = [
    "DEFAULT_TIE_M", "SafestChoice", "check_tie_tolerance", "equally_good", "expected_metres",
    "incident_from_every_state", "safest_among",
]
