"""The third route of a plan: the shortest under a risk budget, the trade-off curve, and why routes are risky.

Runs for ``plan --risk-budget P`` between the exact stage and the files: the budget
search and the trade-off curve of :mod:`planner.budget` on the plan's own model at its
noise, the nominal route of the delivered policy, and for every delivered route the
leg decomposition of its P(incident) and its likeliest failure paths
(:mod:`planner.causes`). Everything it hands on is plain data (numbers, strings, lists)
so that the same record goes into ``risk.json`` and the manifest, and the briefing
reads it back from the run folder exactly as it was written.

The route is called ``budget`` in file names and tables (``routes-budget.geojson``)
and "within-budget" where people read it.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from planner.errors import SettingsError

#: The budget route's name in files, tables and arrays, and how a reader sees it.
ROUTE_NAME = "budget"
ROUTE_LABEL = "within-budget"
#: Failure paths kept per zone and in all, per route.
PATHS_PER_ZONE = 3
PATHS_SHOWN = 5
#: Off-route moves listed per failure path before "and N more".
MOVES_LISTED = 6


def check_budget(value, option: str = "PlanSettings.risk_budget") -> float:
    """The risk budget as a float, refused unless a probability strictly between 0 and 1."""
    try:
        number = float(value)
    except (TypeError, ValueError) as err:
        raise SettingsError(f"{option} {str(value)[:40]!r} is not a number; give a probability such as 1e-3") \
            from err
    if isinstance(value, bool) or not (math.isfinite(number) and 0.0 < number < 1.0):
        raise SettingsError(f"{option} must be a probability strictly between 0 and 1 (such as 1e-3), "
                            f"got {str(value)[:40]}")
    return number


def check_set_by(name) -> str | None:
    """Who set the budget, checked as a name (printable, bounded), or None."""
    if name is None:
        return None
    from planner.names import clean_name

    return clean_name(name, "PlanSettings.budget_set_by")


@dataclass(frozen=True)
class BudgetPlan:
    """The budget search and the trade-off curve of one plan.

    Attributes
    ----------
    budget, epsilon, drift_scale : the limit and the noise and drift it is judged at.
    set_by : who set it (None: to be filled in by hand on the sign-off).
    answer : :class:`planner.budget.BudgetRoute`.
    curve : the trade-off vertices, by increasing penalty.
    n_solves_budget : exact solves of the budget search.
    n_solves_curve : further exact solves the curve needed (penalties already solved
        are reused).
    seconds : wall time of both.
    """

    budget: float
    epsilon: float
    drift_scale: float
    set_by: str | None
    answer: object
    curve: tuple
    n_solves_budget: int
    n_solves_curve: int
    seconds: float

    @property
    def greedy(self) -> np.ndarray:
        """int64 ``(n_states,)``: the delivered deterministic policy."""
        return self.answer.route.greedy


def plan_budget(model, epsilon: float, budget: float, *, tie_m: float, drift_scale: float = 1.0,
                set_by: str | None = None, warm=None) -> BudgetPlan:
    """The budget route and the trade-off curve on ``model`` at noise ``epsilon``.

    One warm-started :class:`planner.budget.Solver` serves both, so the penalties the
    budget search solved are not solved again for the curve; ``warm`` (values of the
    on-policy fixed point at the model's own penalty, when the caller has them) starts
    the first solve.
    """
    from planner.budget import CURVE_LENGTH_M, CURVE_RATIO, Solver, risk_budget, tradeoff_curve

    began = time.perf_counter()
    solver = Solver(model, epsilon, tie_m, warm=warm)
    answer = risk_budget(model, epsilon, check_budget(budget), tie_m=tie_m, solver=solver)
    n_budget = solver.n_solves
    curve, n_total = tradeoff_curve(model, epsilon, tie_m=tie_m, solver=solver,
                                    length_resolution_m=CURVE_LENGTH_M, ratio_resolution=CURVE_RATIO)
    return BudgetPlan(budget=float(budget), epsilon=float(epsilon), drift_scale=float(drift_scale),
                      set_by=set_by, answer=answer, curve=tuple(curve), n_solves_budget=n_budget,
                      n_solves_curve=n_total - n_budget, seconds=time.perf_counter() - began)


def _point(p) -> dict:
    return {"penalty_m": float(p.penalty_m), "p_incident": float(p.p_incident), "length_m": float(p.length_m)}


def budget_record(plan: BudgetPlan, routes: dict) -> dict:
    """The budget search as plain data (``risk.json``, the manifest, the briefing).

    ``routes`` maps route name to ``planner.route.Route`` and their headline
    P(incident) (``{name: (route, p_incident)}``): when no policy meets the budget, the
    record names the least risky of them and of the search.
    """
    a = plan.answer
    least = min(((p, name) for name, (_, p) in routes.items() if math.isfinite(p)), default=(math.inf, ""))
    least_name = least[1]
    if a.route.p_incident <= least[0]:
        least = (a.route.p_incident, ROUTE_NAME)
        least_name = ROUTE_NAME
    return {
        "budget": plan.budget, "noise": plan.epsilon, "drift_scale": plan.drift_scale, "set_by": plan.set_by,
        "met": bool(a.met), "route": _point(a.route), "gap": float(a.gap),
        "shorter": _point(a.shorter) if a.shorter is not None else None,
        "mix_share": None if a.mix_share is None else float(a.mix_share),
        "mixed_length_m": None if a.mixed_length_m is None else float(a.mixed_length_m),
        "least_p_incident": float(least[0]), "least_risky_route": least_name,
        "n_solves": int(plan.n_solves_budget), "n_solves_curve": int(plan.n_solves_curve),
        "curve": [_point(p) for p in plan.curve],
    }


def budget_text(budget: float, fmt) -> str:
    """The budget in words: the one notation, or its digits where the notation stops resolving.

    >>> from planner.risk import format_prob
    >>> budget_text(1e-3, format_prob), budget_text(1e-15, format_prob)
    ('0.10% (1 in 1,000)', '1e-15')
    """
    text = fmt(budget)
    return f"{budget:.3g}" if text.startswith("<") else text


def budget_statement(record: dict, fmt) -> str:
    """One or two plain sentences: what the budget was and what meets it.

    ``fmt`` formats a probability (``planner.risk.format_prob``).
    """
    r = record
    at = f"at noise {r['noise']:g} and drift x{r['drift_scale']:g}"
    if not r["met"]:
        which = ("the within-budget route delivered here (the least risky policy the search found)"
                 if r["least_risky_route"] == ROUTE_NAME else f"the {r['least_risky_route']} route")
        return (f"No route meets the risk budget {budget_text(r['budget'], fmt)} {at}: the least P(incident) any route "
                f"achieves is {fmt(r['least_p_incident'])}, by {which}. The route delivered as within-budget is "
                f"that least risky one, {fmt(r['route']['p_incident'])} over the budget by "
                f"{fmt(-r['gap'])}; it does NOT meet the budget.")
    text = (f"Risk budget {budget_text(r['budget'], fmt)} {at}: the shortest route that meets it has P(incident) "
            f"{fmt(r['route']['p_incident'])} (below the budget by {fmt(r['gap'])}) and expected length "
            f"{r['route']['length_m']:.1f} m-equiv.")
    if r["shorter"] is not None and r["mix_share"] is not None:
        text += (f" The next shorter policy, {r['shorter']['length_m']:.1f} m-equiv., has P(incident) "
                 f"{fmt(r['shorter']['p_incident'])}, over the budget. Flying it on a share "
                 f"{r['mix_share']:.3f} of runs and the within-budget route otherwise would meet the budget exactly "
                 f"at {r['mixed_length_m']:.1f} m-equiv. expected; a vehicle cannot fly a coin flip, so the "
                 "deterministic route is delivered.")
    return text + f" {r['n_solves']} exact solves."


# ----------------------------------------------------------------------------- why a route is risky


def explain_route(model, grid, route, path, greedy, epsilon: float, *, k: int = PATHS_PER_ZONE,
                  shown: int = PATHS_SHOWN) -> dict:
    """Where one route's P(incident) comes from, as plain data.

    Parameters
    ----------
    model, grid : the plan's model and grid.
    route : its ``planner.route.Route``; path its ``planner.route.NominalPath``.
    greedy : int ``(n_states,)`` the policy; epsilon the noise it is flown with.
    k : failure paths per zone; shown: how many of all are kept (most probable first).

    Returns
    -------
    dict
        ``p_incident`` (the sum of the shares), ``length_m`` (:func:`expected_length_m`),
        ``zones``, ``legs`` (one dict per leg:
        ``leg`` (1-based), ``from_seq``, ``to_seq``, ``length_m``, ``p_incident``,
        ``by_zone``) and ``paths`` (``zone``, ``probability``, ``moves``,
        ``off_policy`` (1-based move numbers where noise, slip or drift took the vehicle
        off the policy's likeliest landing), ``left_route_leg`` (the leg on which it was
        last on the nominal route), ``east_m``, ``north_m`` (cell centres)).
    """
    from planner.causes import failure_paths, leg_shares, legs_of_route

    states = path.states
    legs = legs_of_route(route)[: states.size]
    shares = leg_shares(model, greedy, epsilon, states, legs)
    by_leg = shares.shares
    wps = route.waypoints
    leg_records = []
    for j in range(by_leg.shape[0]):
        lo, hi = (wps[j], wps[j + 1]) if j + 1 < len(wps) else (wps[-1], wps[-1])
        leg_records.append({"leg": j + 1, "from_seq": int(lo.seq), "to_seq": int(hi.seq),
                            "length_m": float(hi.leg_m) if j + 1 < len(wps) else 0.0,
                            "p_incident": float(by_leg[j].sum()),
                            "by_zone": {z: float(v) for z, v in zip(shares.zones, by_leg[j], strict=True)}})
    east, north = grid.centres()
    east, north = east.ravel(), north.ravel()
    position = {int(s): int(i) for i, s in reversed(list(enumerate(states)))}
    found = sorted(failure_paths(model, greedy, epsilon, k=k), key=lambda f: -f.probability)[:shown]
    path_records = []
    for f in found:
        on = [i for i, s in enumerate(f.states) if int(s) in position]
        last = position[int(f.states[on[-1]])] if on else 0
        path_records.append({
            "zone": f.zone, "probability": float(f.probability), "moves": int(f.states.size),
            "off_policy": [i + 1 for i in f.off_policy], "left_route_leg": int(legs[last]) + 1,
            "east_m": [round(float(east[s]), 3) for s in f.states],
            "north_m": [round(float(north[s]), 3) for s in f.states],
        })
    return {"route": route.name, "noise": float(epsilon), "p_incident": float(shares.p_incident),
            "length_m": expected_length_m(model, greedy, epsilon), "zones": list(shares.zones),
            "legs": leg_records, "paths": path_records}


def expected_length_m(model, greedy, epsilon: float) -> float:
    """Expected metres-equivalent of the moves until the run ends, at noise ``epsilon``.

    The length of :mod:`planner.budget` (incidents cost nothing in it), so that every
    route can be placed on the trade-off curve; NaN when a run from the start can
    loop forever.
    """
    from planner.budget import cost_only
    from planner.model import epsilon_greedy, policy_chain, reaches_absorption, solve_transient

    chain = policy_chain(cost_only(model), epsilon_greedy(greedy, model.n_actions, epsilon))
    ends = reaches_absorption(chain, model.active)
    if not ends[model.start]:
        return math.nan
    cost, _ = solve_transient(chain, -chain.reward, ends)
    return float(cost[model.start])


def moves_text(record: dict) -> str:
    """The moves of a failure path where noise or drift acted, in words ("moves 3, 9 and 10")."""
    moves = record["off_policy"]
    if not moves:
        return "none"
    listed = [str(m) for m in moves[:MOVES_LISTED]]
    more = len(moves) - len(listed)
    if more:
        return f"moves {', '.join(listed)} and {more} more"
    if len(listed) == 1:
        return f"move {listed[0]}"
    return f"moves {', '.join(listed[:-1])} and {listed[-1]}"


# ----------------------------------------------------------------------------- risk.json


def risk_records(rows, *, noise: float, drift_scale: float, budget: dict | None, causes: dict) -> list[dict]:
    """The rows of ``risk.json``: each risk row's plain data, the headline rows with more.

    The row of each delivered route at the plan's noise and drift carries ``causes``
    (:func:`explain_route`); the budget route's also ``risk_budget`` (:func:`budget_record`,
    the trade-off points included). Readers of the plain rows ignore both keys.
    """
    out = []
    for r in rows:
        record = r.as_dict()
        if math.isclose(r.noise, noise) and math.isclose(r.drift_scale, drift_scale):
            if r.policy in causes:
                record["causes"] = causes[r.policy]
            if r.policy == ROUTE_NAME and budget is not None:
                record["risk_budget"] = budget
        out.append(record)
    return out


def extras_from_records(records) -> tuple[dict | None, dict]:
    """The budget record and each route's causes, read back from ``risk.json``'s rows."""
    budget, causes = None, {}
    for r in records:
        if isinstance(r.get("causes"), dict):
            causes[str(r["policy"])] = r["causes"]
        if isinstance(r.get("risk_budget"), dict):
            budget = r["risk_budget"]
    if budget is not None:
        _check_budget_record(budget)
    for record in causes.values():
        _check_causes_record(record)
    return budget, causes


def _check_budget_record(r: dict) -> None:
    from planner.errors import RunFolderError

    try:
        float(r["budget"]), bool(r["met"]), float(r["route"]["p_incident"]), float(r["least_p_incident"])
        for p in r["curve"]:
            float(p["p_incident"]), float(p["length_m"])
    except (KeyError, TypeError, ValueError) as err:
        raise RunFolderError(f"risk.json: the risk-budget record is not the shape plan writes ({err})") from err


def _check_causes_record(r: dict) -> None:
    from planner.errors import RunFolderError

    try:
        float(r["p_incident"])
        for leg in r["legs"]:
            int(leg["leg"]), float(leg["p_incident"])
        for p in r["paths"]:
            float(p["probability"]), str(p["zone"]), len(p["east_m"]), len(p["north_m"])
    except (KeyError, TypeError, ValueError) as err:
        raise RunFolderError(f"risk.json: a route's causes record is not the shape plan writes ({err})") from err


__all__ = ["BudgetPlan", "ROUTE_LABEL", "ROUTE_NAME", "budget_record", "budget_statement", "check_budget",
           "check_set_by", "explain_route", "extras_from_records", "moves_text", "plan_budget", "risk_records"]
