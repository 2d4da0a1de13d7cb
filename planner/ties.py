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
from dataclasses import dataclass, field

import numba
import numpy as np

from planner import checks
from planner.errors import SettingsError
from planner.exact import _can_end, _sweep_orders, near_best
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
#: Chains with more transient entries than this are solved by Gauss-Seidel sweeps
#: instead of a sparse LU factorisation. The LU's fill-in grows with the reach of a
#: move in cells: a 250,000-state chain of one-cell moves (1.9 M entries) factorises
#: in 4 s and 0.5 GB, while the 1 m ground yard's 4.5 m moves (118,556 states) took
#: the factorisation past 7 GB. Below this size the LU is fast and exact to round-off.
LU_MAX_ENTRIES = 2_500_000
#: The sweeps of a policy's figures stop when one sweep changes no figure by more than
#: this (relative to ``max(1, |figure|)``) and one synchronous update of every state
#: confirms it. The error of a probability is then at most this times the largest
#: expected number of moves to the end of the run (a few thousand on a 250,000-cell
#: yard: below 1e-9, against figures quoted to 3 significant digits of at least 1e-6).
SWEEP_TOLERANCE = 1e-13
#: Cap on those sweeps; a policy that needs more (a near-closed loop) is solved by LU.
MAX_FIGURE_SWEEPS = 5_000


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
    check_tie_m(tie_m, "tie_m")
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
    incident : float64 ``(n_states,)``, P(incident) of ``greedy`` from every state
        (None when not computed), e.g. to warm-start a solve at another penalty.
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
    incident: np.ndarray | None = field(default=None, repr=False, compare=False)


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
    return _policy_figures(model, np.asarray(greedy, dtype=np.int64), epsilon, check=check).ends[:, 1]


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
    return _policy_figures(model, np.asarray(greedy, dtype=np.int64), epsilon, costs=True).metres


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


@dataclass(frozen=True)
class _Figures:
    """The figures of one policy executed with noise.

    ``x`` is float64 ``(n_states, 4)``: from every state, P(the run ends at the goal),
    P(incident), and where the sweeps computed them the expected metres and return
    (nan elsewhere); ``metres`` and ``value`` are from the start (with ``costs``;
    ``inf`` and ``-inf`` when the run may not end, nan when not asked for); ``sweeps``
    is 0 when the chain was solved by LU.
    """

    x: np.ndarray
    metres: float
    value: float
    sweeps: int

    @property
    def ends(self) -> np.ndarray:
        """P(goal) and P(incident) from every state, float64 ``(n_states, 2)``."""
        return self.x[:, :2]


def _policy_figures(model: Model, greedy: np.ndarray, epsilon: float, *, costs: bool = False,
                    check: bool = True, warm: np.ndarray | None = None) -> _Figures:
    """The figures of ``greedy`` executed with noise ``epsilon`` (see :class:`_Figures`).

    Small chains are solved by sparse LU (:func:`planner.model.solve_transient`), chains
    of more than ``LU_MAX_ENTRIES`` transient entries by Gauss-Seidel sweeps of the
    outcome table in the four raster orders, restricted to the states that can end the
    run under the policy (the system there is a non-singular M-matrix, so the sweeps
    converge from any start, ``warm`` for example: the ``x`` of a nearby policy), to
    ``SWEEP_TOLERANCE``. A policy whose sweeps do not settle within
    ``MAX_FIGURE_SWEEPS`` (a near-closed loop) is solved by LU after all.
    """
    chain = policy_chain(model, epsilon_greedy(greedy, model.n_actions, epsilon))
    if chain.transient.nnz > LU_MAX_ENTRIES:
        figures = _swept_figures(model, chain, greedy, float(epsilon), costs, warm)
        if figures is not None:
            return figures
    x = np.full((model.n_states, 4), np.nan)
    x[:, 0] = _incident(model, chain, check=check, first=EVENT_GOAL, last=EVENT_GOAL + 1)
    x[:, 1] = _incident(model, chain, check=check)
    metres, value = _expected_metres_and_value(model, chain) if costs else (math.nan, math.nan)
    return _Figures(x=x, metres=metres, value=value, sweeps=0)


def _swept_figures(model: Model, chain: Chain, greedy: np.ndarray, epsilon: float, costs: bool,
                   warm: np.ndarray | None) -> _Figures | None:
    """:func:`_policy_figures` by Gauss-Seidel sweeps; None when they do not settle.

    Where every state that can end the run ends it with probability 1 (the usual case)
    the expected metres and return are swept with the probabilities, so that a warm
    start carries them too.
    """
    active, n_s = model.active, model.n_states
    exits = np.asarray(chain.absorb.sum(axis=1)).ravel() > 0
    ends = reaching(chain.transient, exits & active) & active
    finite = ends & ~reaching(chain.transient, active & ~ends)
    together = bool(np.array_equal(finite, ends))
    x = np.zeros((n_s, 4))
    if warm is not None:
        x[:] = np.nan_to_num(warm, nan=0.0, posinf=0.0, neginf=0.0)
        x[:, :2] = np.clip(x[:, :2], 0.0, 1.0)
    x[~ends] = 0.0
    table, n_a, greedy = model.table(), model.n_actions, np.ascontiguousarray(greedy, dtype=np.int64)
    move_m = np.ascontiguousarray(model.move_m, dtype=np.float64)
    total, residual = _policy_sweeps(table, n_a, epsilon, greedy, move_m, 4 if together else 2, SWEEP_TOLERANCE,
                                     MAX_FIGURE_SWEEPS, _sweep_orders(model, ends), x)
    if not residual <= SWEEP_TOLERANCE:
        return None
    if not together:
        x[:, 2:] = np.nan
    metres, value = math.nan, math.nan
    if costs:
        metres, value = math.inf, -math.inf
        if finite[model.start]:
            if not together:
                x[:, 2:] = 0.0
                sweeps, residual = _policy_sweeps(table, n_a, epsilon, greedy, move_m, 4, SWEEP_TOLERANCE,
                                                  MAX_FIGURE_SWEEPS, _sweep_orders(model, finite), x)
                if not residual <= SWEEP_TOLERANCE:
                    return None
                total += sweeps
            metres, value = float(x[model.start, 2]), float(x[model.start, 3])
    x[:, :2] = np.clip(x[:, :2], 0.0, 1.0)
    return _Figures(x=x, metres=metres, value=value, sweeps=int(total))


def safest_among(model: Model, allowed: np.ndarray, epsilon: float, *, value: np.ndarray | None = None,
                 riskiest: bool = True, tol: float = REACH_TOLERANCE,
                 max_iter: int = REACH_SWEEPS, start: np.ndarray | None = None) -> SafestChoice:
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
    start : optional float ``(n_states,)`` P(the run ends at the goal) to start the
        safest problem's sweeps from (e.g. ``1 - incident`` of a solve at a nearby
        penalty) instead of 0. Only the policy the sweeps hand to policy improvement
        depends on it: improvement on exact solves then reaches the same optimum.

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
    checks.probability(epsilon, "epsilon", high_open=True)
    active = model.active
    if not allowed[active].any(axis=1).all():
        raise SettingsError("every active state needs at least one allowed action")
    flat = np.ascontiguousarray(allowed.reshape(-1))
    rank = np.zeros(n_s * n_a) if value is None else np.nan_to_num(
        np.asarray(value, dtype=np.float64).reshape(-1), nan=-np.inf, posinf=np.inf, neginf=-np.inf)
    sweepable = active & _can_end(model)
    orders = _sweep_orders(model, sweepable)
    rounds = 0
    # Safest: the most likely to reach the goal (so a loop that never ends counts as a
    # failure, not as safety); riskiest: the most likely to end in an incident.
    targets = (EVENT_GOAL, EVENT_BOUNDARY) if riskiest else (EVENT_GOAL,)
    picks = []
    warm = None
    for target in targets:
        column = 0 if target == EVENT_GOAL else 1
        u = np.zeros(n_s) if warm is None else warm[:, column].copy()
        if start is not None and target == EVENT_GOAL:
            u = np.where(sweepable, np.clip(np.nan_to_num(np.asarray(start, dtype=np.float64), nan=0.0), 0.0, 1.0),
                         0.0)
        # The sweeps only need to get close: policy improvement on exact solves finishes
        # the job (and copes with near-closed loops, where sweeps crawl).
        if max_iter > 0:
            _reach_iteration(model.table(), target, n_a, float(epsilon),
                             flat, -1.0, float(tol), int(max_iter), orders, u)
        greedy = _pick(model.table(), target, n_a, flat, -1.0, u,
                       rank, active, np.full(n_s, -1, np.int64))
        best, best_value, seen = None, -np.inf, set()
        for _ in range(MAX_IMPROVEMENTS):
            rounds += 1
            figures = _policy_figures(model, greedy, epsilon, check=False, warm=warm)
            warm = figures.x
            u = figures.x[:, column]
            if u[model.start] > best_value:
                best, best_value = (greedy, figures), float(u[model.start])
            seen.add(greedy.tobytes())
            greedy = _pick(model.table(), target, n_a, flat, -1.0, u,
                           rank, active, greedy)
            if greedy.tobytes() in seen:
                break
        picks.append(best)
    # Every reported figure of a policy comes from one evaluation of it (checked).
    (safe, safe_figures), (risky, risky_figures) = picks[0], picks[-1]
    s0 = model.start
    final = _policy_figures(model, safe, epsilon, costs=True, warm=safe_figures.x)
    p_safe = float(final.ends[s0, 1])
    p_risky = p_safe if risky is safe else float(
        _policy_figures(model, risky, epsilon, warm=risky_figures.x).x[s0, 1])
    return SafestChoice(
        greedy=safe, riskiest=risky, p_incident=p_safe, p_incident_max=p_risky, expected_m=final.metres,
        value=final.value, n_tied_states=int((allowed[active].sum(axis=1) > 1).sum()), epsilon=float(epsilon),
        improvements=rounds, incident=final.x[:, 1].copy(),
    )


def check_tie_m(tie_m, setting: str):
    """A tie tolerance: a number of metres-equivalent >= 0."""
    return checks.number(tie_m, setting, low=0.0, says="a number of metres-equivalent >= 0")


def check_tie_tolerance(model: Model, tie_m: float, setting: str = "tie_m") -> None:
    """Refuse a tie tolerance that could let equally good actions go round in a loop.

    A loop of near-optimal moves costs at most ``tie_m`` per move, so a tolerance below
    the cheapest move's cost rules loops out and every tie-break stays a proper policy.
    """
    cheapest = float(-model.reward[model.event == EVENT_NONE].max(initial=-math.inf))
    check_tie_m(tie_m, setting)
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


@numba.njit(cache=True, inline="always")
def _policy_backup(t, n_actions, epsilon, greedy, move_m, n_cols, x, s, out):
    """One synchronous backup of state ``s`` under ``greedy`` with noise, into ``out``.

    Columns: P(the run ends at the goal), P(incident), expected metres, expected return.
    """
    for c in range(n_cols):
        out[c] = 0.0
    g = greedy[s]
    for a in range(n_actions):
        w = epsilon / n_actions
        if a == g:
            w += 1.0 - epsilon
        if w == 0.0:
            continue
        goal = 0.0
        incident = 0.0
        metres = 0.0
        ret = 0.0
        k = s * n_actions + a
        for j in range(t.offsets[k], t.offsets[k + 1]):
            p = t.prob[j]
            e = t.event[j]
            if e == EVENT_NONE:
                nxt = t.next_state[j]
                goal += p * x[nxt, 0]
                incident += p * x[nxt, 1]
                if n_cols > 2:
                    metres += p * x[nxt, 2]
                    ret += p * x[nxt, 3]
            elif e == EVENT_GOAL:
                goal += p
            else:
                incident += p
            ret += p * t.reward[j]
        out[0] += w * goal
        out[1] += w * incident
        if n_cols > 2:
            out[2] += w * (move_m[a] + metres)
            out[3] += w * ret


@numba.njit(cache=True)
def _policy_sweeps(t, n_actions, epsilon, greedy, move_m, n_cols, tol, max_iter, orders, x):
    """Gauss-Seidel sweeps of a policy's figures in place; returns (sweeps, residual).

    ``x`` is float64 ``(n_states, 4)``; the first ``n_cols`` columns are swept over the
    states of ``orders`` (others keep their values). Sweeps until one changes nothing by
    more than ``tol`` relative to ``max(1, |x|)``, confirmed by one synchronous update;
    the residual is that update's largest relative change (inf when capped first).
    """
    n_orders = orders.shape[0]
    out = np.empty(4, np.float64)
    fresh = np.empty((orders.shape[1], 4), np.float64)
    residual = np.inf
    sweeps = 0
    while sweeps < max_iter:
        order = orders[sweeps % n_orders]
        change = 0.0
        for i in range(order.size):
            s = order[i]
            _policy_backup(t, n_actions, epsilon, greedy, move_m, n_cols, x, s, out)
            for c in range(n_cols):
                d = abs(out[c] - x[s, c]) / max(1.0, abs(out[c]))
                if d > change:
                    change = d
                x[s, c] = out[c]
        sweeps += 1
        if change <= tol:
            residual = 0.0
            for i in range(order.size):
                _policy_backup(t, n_actions, epsilon, greedy, move_m, n_cols, x, order[i], out)
                for c in range(n_cols):
                    fresh[i, c] = out[c]
            for i in range(order.size):
                s = order[i]
                for c in range(n_cols):
                    d = abs(fresh[i, c] - x[s, c]) / max(1.0, abs(fresh[i, c]))
                    if d > residual:
                        residual = d
            if residual <= tol:
                break
            residual = np.inf
    return sweeps, residual


__all__ = [
    "DEFAULT_TIE_M", "SafestChoice", "check_tie_tolerance", "equally_good", "expected_metres",
    "incident_from_every_state", "safest_among",
]
