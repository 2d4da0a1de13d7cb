"""The risk budget: the shortest route whose P(incident) stays under a limit, and the trade-off curve.

Part of the exact stage. A reviewer signs "at most 1 in 1000 runs ends in a hazard", not
a hazard penalty. The penalty of an incident is a Lagrange multiplier on P(incident):
for a penalty ``lam`` the epsilon-greedy on-policy fixed point of the model whose
incidents cost ``lam`` (and whose moves cost what they always cost) minimises
``length + lam * P(incident)`` over the policies the vehicle can fly with the run's
noise. As ``lam`` grows, P(incident) of that optimum falls in steps; the distinct optima
are the vertices of the lower convex hull of (P(incident), expected length) over all
policies (Altman, *Constrained Markov Decision Processes*, 1999, ch. 3 and 12).

:func:`tradeoff_curve` finds every vertex once by intersecting the Lagrangian lines of
neighbouring vertices (each new solve either finds a vertex between them or proves they
are adjacent); :func:`risk_budget` walks the same way towards the budget from the
model's own penalty. Each solve is warm-started from the previous one's values. Ties
in every solve are broken by safety (:func:`planner.ties.safest_among`).
:func:`constrained_lp` solves the constrained problem directly as a linear programme
over occupancy measures (HiGHS through ``scipy.optimize.linprog``), for cross-checks on
small grids.

"Length" here is the expected metres-equivalent of the moves made until the run ends
(goal or incident), at the run's noise: move lengths times cost factors, plus the
penalties of zones that do not end the run; incidents themselves cost nothing in it.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from planner.errors import SettingsError
from planner.exact import on_policy_q
from planner.model import EVENT_BOUNDARY, EVENT_HAZARD, EVENT_NONE, Model
from planner.ties import equally_good, safest_among

#: Largest penalty the search tries (metres-equivalent per incident): beyond this the
#: value iteration's convergence tolerance stops resolving the move costs.
MAX_PENALTY_M = 1e7
#: Smallest penalty of the trade-off curve, as a share of the model's own penalty.
LOW_PENALTY_SHARE = 1e-3
#: Two Lagrangian values closer than this (relative) mean no new vertex lies between.
HULL_TOLERANCE = 1e-9
#: Cap on solves of one curve or one budget search.
MAX_SOLVES = 200
#: Resolution of the trade-off curve: two neighbouring vertices closer than this in
#: expected length (metres-equivalent) or whose P(incident) differ by less than this
#: ratio are not searched between. Far below the risk levels, the hull has dozens of
#: vertices a few centimetres and a few per cent apart that no reviewer tells apart.
CURVE_LENGTH_M = 0.5
CURVE_RATIO = 1.1


@dataclass(frozen=True)
class TradeoffPoint:
    """One vertex of the trade-off curve: the optimum for one penalty.

    Attributes
    ----------
    penalty_m : the incident penalty (metres-equivalent) it was solved for.
    greedy : int64 ``(n_states,)``, the policy (ties broken by safety).
    p_incident : its exact P(incident) from the start, at the noise.
    length_m : its expected length (see the module notes).
    """

    penalty_m: float
    greedy: np.ndarray
    p_incident: float
    length_m: float

    def lagrangian(self, penalty_m: float) -> float:
        """``length_m + penalty_m * p_incident``."""
        return self.length_m + penalty_m * self.p_incident


@dataclass(frozen=True)
class BudgetRoute:
    """The answer to "the shortest route with P(incident) at most the budget".

    Attributes
    ----------
    budget : the limit on P(incident).
    epsilon : the execution noise the limit is judged at.
    met : whether any policy meets it.
    route : the deterministic policy delivered: the shortest that meets the budget, or,
        when none does, the least risky found.
    gap : ``budget - route.p_incident`` (>= 0 when met).
    shorter : the neighbouring vertex on the curve that breaks the budget (None when
        ``route`` is the model's shortest, or the budget is not met).
    mix_share : the probability of flying ``shorter`` (and ``route`` otherwise) that
        meets the budget exactly: the exact constrained optimum, which a vehicle cannot
        fly; None without ``shorter``.
    mixed_length_m : the expected length of that mixture.
    n_solves : exact solves made.
    """

    budget: float
    epsilon: float
    met: bool
    route: TradeoffPoint
    gap: float
    shorter: TradeoffPoint | None
    mix_share: float | None
    mixed_length_m: float | None
    n_solves: int


class Solver:
    """Exact Lagrangian solves on one model at one noise, warm-started, counted and cached.

    One solver can serve a budget search and a trade-off curve: penalties solved once
    are not solved again.
    """

    def __init__(self, model: Model, epsilon: float, tie_m: float, warm: np.ndarray | None = None):
        self.model, self.epsilon, self.tie_m = model, float(epsilon), float(tie_m)
        self.base = cost_only(model)
        self.incident = (model.event >= EVENT_BOUNDARY).astype(np.float64)
        # the first solve may start from values the caller already has (a plan's exact
        # on-policy reference at the model's own penalty)
        self.warm = None if warm is None else np.asarray(warm, dtype=np.float64)
        # the previous solve's penalty and its delivered policy's P(incident) from every
        # state: the next solve starts from that policy's exact value at the new penalty
        self.last: tuple[float, np.ndarray] | None = None
        self.n_solves = 0
        self.cache: dict[float, TradeoffPoint] = {}

    def __call__(self, penalty_m: float) -> TradeoffPoint:
        """The optimum at ``penalty_m``: solved once, warm-started from the previous solve."""
        penalty_m = float(penalty_m)
        if penalty_m in self.cache:
            return self.cache[penalty_m]
        if self.n_solves >= MAX_SOLVES:
            raise SettingsError(f"the risk-budget search needed more than {MAX_SOLVES} exact solves")
        lagrangian = dataclasses.replace(self.model, reward=self.base.reward - penalty_m * self.incident)
        warm, start = self.warm, None
        if self.last is not None and warm is not None:
            # V = -(length + penalty * P(incident)) for a fixed policy, so shifting the
            # penalty shifts its value by the change times its P(incident): the exact
            # value of the previous policy here, a close start for value iteration.
            lam, incident = self.last
            warm = warm - (penalty_m - lam) * incident
            start = 1.0 - incident
        solution = on_policy_q(lagrangian, self.epsilon, warm=warm)
        self.warm = solution.v
        choice = safest_among(lagrangian, equally_good(solution.q, self.tie_m), self.epsilon, value=solution.q,
                              riskiest=False, start=start)
        if choice.incident is not None:
            self.last = (penalty_m, choice.incident)
        self.n_solves += 1
        # The Lagrangian return is -(length + penalty * P(incident)).
        point = TradeoffPoint(penalty_m=penalty_m, greedy=choice.greedy, p_incident=choice.p_incident,
                              length_m=-choice.value - penalty_m * choice.p_incident)
        self.cache[penalty_m] = point
        return point


def cost_only(model: Model) -> Model:
    """The model with incidents costing only the move they end (no penalty).

    Its rewards are minus the lengths of :mod:`planner.budget`; the penalty of every
    zone that ends the run (and of leaving the boundary) is taken out, the penalties of
    zones that do not end it stay.
    """
    penalty = np.zeros(model.event.size)
    boundary = model.event == EVENT_BOUNDARY
    penalty[boundary] = model.boundary_penalty_m
    hazard = model.event >= EVENT_HAZARD
    penalty[hazard] = np.asarray(model.penalty_m, dtype=np.float64)[model.event[hazard] - EVENT_HAZARD]
    return dataclasses.replace(model, reward=model.reward + penalty)


def _adjacent(a: TradeoffPoint, b: TradeoffPoint, m: TradeoffPoint, lam: float) -> bool:
    """Whether ``a`` and ``b`` are neighbours on the hull.

    They are when the solve ``m`` at the intersection ``lam`` of their lines found
    nothing below those lines.
    """
    line = a.lagrangian(lam)
    return m.lagrangian(lam) >= line - HULL_TOLERANCE * max(1.0, abs(line))


def _intersection(a: TradeoffPoint, b: TradeoffPoint) -> float | None:
    """Penalty at which the Lagrangian lines of ``a`` (riskier) and ``b`` cross."""
    dp = a.p_incident - b.p_incident
    if not dp > 0:
        return None
    return (b.length_m - a.length_m) / dp


def tradeoff_curve(model: Model, epsilon: float, *, tie_m: float = 0.01, low_m: float | None = None,
                   high_m: float | None = None, length_resolution_m: float = 0.0, ratio_resolution: float = 1.0,
                   solver: Solver | None = None) -> tuple[list[TradeoffPoint], int]:
    """Every vertex of the lower convex hull of (P(incident), length) between two penalties.

    Parameters
    ----------
    model : the model (its own penalties are replaced by each solve's).
    epsilon : execution noise in [0, 1).
    tie_m : tie tolerance of each solve.
    low_m, high_m : penalty range; default ``LOW_PENALTY_SHARE`` times the model's
        boundary penalty, and the penalty beyond which P(incident) stops falling (found
        by multiplying by 10, at most ``MAX_PENALTY_M``).

    Returns
    -------
    (points by increasing penalty, i.e. falling P(incident) and rising length; number
    of exact solves)
    """
    solve = solver if solver is not None else Solver(model, epsilon, tie_m)
    low = float(low_m if low_m is not None else LOW_PENALTY_SHARE * model.boundary_penalty_m)
    a = solve(low)
    if high_m is None:
        high, b = max(low * 10, model.boundary_penalty_m), None
        b = solve(high)
        while high < MAX_PENALTY_M:
            nxt = solve(min(MAX_PENALTY_M, high * 10))
            if not nxt.p_incident < b.p_incident * (1 - 1e-9):
                break
            high, b = nxt.penalty_m, nxt
    else:
        b = solve(float(high_m))
    points = {a.penalty_m: a, b.penalty_m: b}
    stack = [(a, b)]
    while stack:
        left, right = stack.pop()
        if (right.length_m - left.length_m < length_resolution_m
                or left.p_incident < ratio_resolution * right.p_incident):
            continue
        lam = _intersection(left, right)
        if lam is None or not (left.penalty_m < lam < right.penalty_m):
            continue
        mid = solve(lam)
        if _adjacent(left, right, mid, lam):
            continue
        points[mid.penalty_m] = mid
        stack += [(left, mid), (mid, right)]
    ordered = [points[k] for k in sorted(points)]
    # Keep one point per distinct policy (the first penalty that gives it).
    out: list[TradeoffPoint] = []
    for p in ordered:
        if not out or not np.array_equal(out[-1].greedy, p.greedy):
            out.append(p)
    return out, solve.n_solves


def risk_budget(model: Model, epsilon: float, budget: float, *, tie_m: float = 0.01,
                solver: Solver | None = None) -> BudgetRoute:
    """The policy of least expected length whose exact P(incident) is at most ``budget``.

    Brackets the smallest penalty whose optimum meets the budget (from the model's own
    penalty, multiplying or dividing by 10), then closes the bracket by solving at the
    intersection of the two bracket policies' Lagrangian lines until they are
    neighbours on the hull. The riskier neighbour and the mixing share that would meet
    the budget exactly are reported with it.

    Parameters
    ----------
    model : the model.
    epsilon : execution noise in [0, 1).
    budget : the limit on P(incident), in [0, 1].
    tie_m : tie tolerance of each solve.
    solver : a :class:`Solver` on the same model and noise to share; a new one by default.

    Returns
    -------
    BudgetRoute

    Raises
    ------
    SettingsError
        On a budget that is not a number in [0, 1].
    """
    if not (isinstance(budget, (int, float)) and not isinstance(budget, bool) and math.isfinite(budget)
            and 0.0 <= budget <= 1.0):
        raise SettingsError(f"risk budget must be a probability in [0, 1], got {budget!r}")
    solve = solver if solver is not None else Solver(model, epsilon, tie_m)
    lam = float(model.boundary_penalty_m)
    here = solve(lam)
    if here.p_incident <= budget:
        safe, risky = here, None
        while lam > LOW_PENALTY_SHARE * model.boundary_penalty_m:
            lam /= 10
            p = solve(lam)
            if p.p_incident > budget:
                risky = p
                break
            safe = p
    else:
        risky, safe = here, None
        while lam < MAX_PENALTY_M:
            lam = min(MAX_PENALTY_M, lam * 10)
            p = solve(lam)
            if p.p_incident <= budget:
                safe = p
                break
            risky = p
    if safe is None:
        return BudgetRoute(budget=float(budget), epsilon=float(epsilon), met=False, route=risky,
                           gap=float(budget - risky.p_incident), shorter=None, mix_share=None, mixed_length_m=None,
                           n_solves=solve.n_solves)
    while risky is not None:
        lam = _intersection(risky, safe)
        if lam is None or not (risky.penalty_m < lam < safe.penalty_m):
            break
        mid = solve(lam)
        if _adjacent(risky, safe, mid, lam):
            break
        if mid.p_incident <= budget:
            safe = mid
        else:
            risky = mid
    share = mixed = None
    if risky is not None and risky.p_incident > safe.p_incident:
        share = (budget - safe.p_incident) / (risky.p_incident - safe.p_incident)
        mixed = share * risky.length_m + (1 - share) * safe.length_m
    return BudgetRoute(budget=float(budget), epsilon=float(epsilon), met=True, route=safe,
                       gap=float(budget - safe.p_incident), shorter=risky, mix_share=share, mixed_length_m=mixed,
                       n_solves=solve.n_solves)


def constrained_lp(model: Model, epsilon: float, budget: float) -> tuple[float, np.ndarray]:
    """The exact constrained optimum as a linear programme over occupancy measures.

    Variables ``x(s, a) >= 0``, the expected number of times the vehicle is in ``s``
    and the executed policy picks ``a``; flow conservation from the start; every
    action picked at least ``epsilon / n_actions`` of the time in every state (the
    noise: such ``x`` are exactly the occupancies of epsilon-greedy execution of some
    stochastic policy); ``sum x * P(incident of (s, a)) <= budget``; minimise
    ``sum x * length(s, a)``. Solved with HiGHS (``scipy.optimize.linprog``). For
    small grids: the programme has ``n_states * n_actions`` variables.

    Returns
    -------
    (optimal expected length, ``x`` as float64 ``(n_states, n_actions)``)

    Raises
    ------
    SettingsError
        When the programme is infeasible (no policy meets the budget) or fails.
    """
    from scipy.optimize import linprog
    from scipy.sparse import coo_matrix, vstack

    base = cost_only(model)
    n_s, n_a = model.n_states, model.n_actions
    n = n_s * n_a
    counts = np.diff(model.offsets)
    pair = np.repeat(np.arange(n, dtype=np.int64), counts)
    cost = -np.bincount(pair, weights=model.prob * base.reward, minlength=n)
    p_inc = np.bincount(pair, weights=model.prob * (model.event >= EVENT_BOUNDARY), minlength=n)
    going = model.event == EVENT_NONE
    active = np.repeat(model.active, n_a)
    # Flow: sum_a x(s, a) - sum_{s', a'} P(s | s', a') x(s', a') = [s == start], active s.
    rows = np.concatenate([np.arange(n) // n_a, model.next_state[going].astype(np.int64)])
    cols = np.concatenate([np.arange(n), pair[going]])
    vals = np.concatenate([np.ones(n), -model.prob[going]])
    flow = coo_matrix((vals, (rows, cols)), shape=(n_s, n)).tocsr()[np.flatnonzero(model.active)]
    rhs = (np.arange(n_s) == model.start).astype(float)[model.active]
    # Noise: (epsilon / n_a) sum_b x(s, b) - x(s, a) <= 0.
    s_of = np.arange(n) // n_a
    noise_rows = np.repeat(np.arange(n), n_a)
    noise_cols = (s_of[:, None] * n_a + np.arange(n_a)[None, :]).ravel()
    noise = coo_matrix((np.full(n * n_a, epsilon / n_a), (noise_rows, noise_cols)), shape=(n, n)).tocsr()
    noise = noise - coo_matrix((np.ones(n), (np.arange(n), np.arange(n))), shape=(n, n)).tocsr()
    a_ub = vstack([noise[active], coo_matrix(p_inc[None, :])]).tocsr()
    b_ub = np.concatenate([np.zeros(int(active.sum())), [budget]])
    bounds = np.column_stack([np.zeros(n), np.where(active, np.inf, 0.0)])
    result = linprog(cost, A_ub=a_ub, b_ub=b_ub, A_eq=flow, b_eq=rhs, bounds=bounds, method="highs")
    if result.status != 0:
        raise SettingsError(f"constrained programme: {result.message}")
    return float(result.fun), result.x.reshape(n_s, n_a)


__all__ = ["BudgetRoute", "Solver", "TradeoffPoint", "constrained_lp", "cost_only", "risk_budget", "tradeoff_curve"]
