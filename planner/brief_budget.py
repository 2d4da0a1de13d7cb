"""The briefing's account of the risk budget: the within-budget route, the trade-off, and why routes are risky.

Part of the briefing stage (:mod:`planner.brief`): it turns the records of
:mod:`planner.budget_plan` (as ``risk.json`` stores them) into the briefing's blocks
(the kinds of :mod:`planner.brief_page`), and gives the sign-off its budget field. No
computation beyond formatting.
"""

from __future__ import annotations

import math

from planner.brief_page import figure, para, subhead, table
from planner.budget_plan import ROUTE_NAME, budget_statement, budget_text, moves_text
from planner.risk import find_row, format_prob

#: Legs listed per route (the largest shares; the rest are summed in one line).
LEGS_LISTED = 6
#: Route order and the words a reader sees.
ROUTE_WORDS = {"cautious": "cautious", "shortest": "shortest", ROUTE_NAME: "within-budget"}


def budget_words(record: dict) -> str:
    """The budget as the sign-off states it: "P(incident) at most 0.1% (1 in 1,000) at noise 0.1, drift x1"."""
    return (f"P(incident) at most {budget_text(record['budget'], format_prob)} at noise {record['noise']:g}, drift "
            f"x{record['drift_scale']:g}")


def set_by_words(record: dict) -> str:
    """Who set the budget, or that it was not given."""
    who = record.get("set_by")
    return (f"set by {who} (as given to plan --budget-set-by)" if who
            else "who set it was not given to plan: fill in the field below")


def budget_policy(record: dict, route, row) -> dict:
    """The within-budget route's figures in the shape the briefing's route lists use."""
    return {
        "name": ROUTE_NAME, "length_m": route.length_m, "waypoint_length_m": route.waypoint_length_m,
        "waypoints": len(route.waypoints), "moves": route.n_moves, "reached_goal": route.reached_goal,
        "p_incident": format_prob(row.p_incident) if row else "-", "converged": True, "seeds_disagree": False,
        "delivered": "exact (risk-budget search over the hazard penalty, ties by safety)"
                     + ("" if record["met"] else "; DOES NOT MEET THE BUDGET"),
        "met": record["met"],
    }


def _vertex_marks(record: dict, causes: dict) -> list[str]:
    """Which delivered routes lie on each vertex of the curve."""
    marks = []
    for p in record["curve"]:
        on = [ROUTE_WORDS.get(n, n) for n, c in causes.items()
              if math.isfinite(c.get("length_m", math.nan))
              and math.isclose(c["length_m"], p["length_m"], rel_tol=1e-6, abs_tol=1e-6)
              and math.isclose(c["p_incident"], p["p_incident"], rel_tol=1e-6, abs_tol=1e-15)]
        marks.append(", ".join(on))
    return marks


def section_budget(content: dict, record: dict, causes: dict, routes: dict, rows) -> list:
    """The blocks of the briefing's section on the risk budget and the causes of risk."""
    eps, base = content["noise"], content["drift_scale"]
    route = routes[ROUTE_NAME]
    row = find_row(rows, ROUTE_NAME, eps, base)
    out = [para(budget_statement(record, format_prob), alert=not record["met"])]
    out.append(para(f"Budget: {budget_words(record)}; {set_by_words(record)}. It is judged on the exact "
                    "P(incident) of the route flown with the run's noise and planning drift; the stronger-wind "
                    "rows of §risk show how far it moves when the wind is stronger than forecast.", small=True))
    check = row.grid_check if row is not None else None
    half = "-"
    if check and not check.get("skipped"):
        rel = check.get("relative")
        half = (f"{format_prob(check['p_incident_fine'])} at {check['fine_cell_m']:g} m cells"
                + (f" ({100 * rel:+.0f}%)" if rel is not None else "")
                + ("; beyond tolerance: the figure depends on the cell size" if check.get("flagged") else ""))
    elif check:
        half = f"not checked: {check['skipped']}"
    end = "at the goal" if route.reached_goal else f"NOT AT THE GOAL ({route.end_event})"
    facts = [
        ["nominal route ends", end],
        ["route length along the cells / waypoints (m)", f"{route.length_m:.1f} / {route.waypoint_length_m:.1f}"],
        ["moves / waypoints", f"{route.n_moves} / {len(route.waypoints)}"],
        ["closest approach to a hazard", f"{route.min_clearance_m:.1f} m ({route.min_clearance_hazard})"
         if route.min_clearance_hazard else "no hazards"],
        [f"P(incident), noise {eps:g}, drift x{base:g}", format_prob(row.p_incident) if row else "-"],
        ["the same policy re-evaluated at half the cell size", half],
        ["expected length until the run ends (m-equiv.)", f"{record['route']['length_m']:.1f}"],
        ["budget met", "yes" if record["met"] else "NO"],
    ]
    out.append(table(["within-budget route", ""], facts, alerts=[] if record["met"] else [(len(facts) - 1, 1)]))

    marks = _vertex_marks(record, causes)
    curve_rows = [[k + 1, f"{p['penalty_m']:,.1f}", format_prob(p["p_incident"]), f"{p['length_m']:.1f}",
                   "within" if p["p_incident"] <= record["budget"] else "over", marks[k] or ""]
                  for k, p in enumerate(record["curve"])]
    out += [
        subhead("How length trades against risk"),
        para(f"Each line is one deterministic policy on the lower convex hull of (P(incident), expected length) "
             f"over every policy the vehicle can fly with noise {eps:g}: the optimum for a range of hazard "
             "penalties, the first penalty shown. Between two neighbours only a policy that mixes them at random "
             "does better, and a vehicle cannot fly one. Expected length counts the metres-equivalent of the moves "
             "until the run ends (goal or incident), incidents themselves costing nothing; learned routes may lie "
             "off the hull.", small=True),
        table(["#", "hazard penalty (m-equiv.)", "P(incident)", "expected length (m-equiv.)",
               f"budget {budget_text(record['budget'], format_prob)}", "delivered routes here"], curve_rows,
              numeric=(0, 1, 2, 3), small=True),
        figure("tradeoff.png", "trade-off between length and risk",
               f"P(incident) on a log scale against expected length, at noise {eps:g} and drift x{base:g}: the "
               "vertices of the trade-off curve, the delivered routes marked, the budget as a dashed line."),
    ]

    out += [subhead("Why each route is risky"),
            para("Leg decomposition: each run that ends in an incident was on the nominal route for the last time "
                 "on exactly one leg (the start is on the route); a leg's share is the probability of an incident "
                 "whose run left the nominal route for the last time on that leg (leg j runs from waypoint j-1 to "
                 "waypoint j). The shares sum to the route's P(incident). Failure paths: the likeliest sequences of "
                 "cells from the start into a zone, each with its probability, and the moves on which noise, slip "
                 "or drift took the vehicle off the policy's likeliest landing. A path's probability is that of "
                 "exactly that sequence of cells, so it is far below the route's P(incident), which sums a great "
                 "many such paths; the paths show the typical way in. Together they say which leg to re-draw, slow "
                 "down on, or buffer.", small=True)]
    for name in (n for n in ROUTE_WORDS if n in causes):
        c = causes[name]
        legs = sorted(c["legs"], key=lambda leg: -leg["p_incident"])
        total = c["p_incident"]
        listed = [leg for leg in legs[:LEGS_LISTED] if leg["p_incident"] > 0]
        rest = sum(leg["p_incident"] for leg in legs if leg not in listed)
        leg_rows = []
        for leg in listed:
            zone = max(leg["by_zone"].items(), key=lambda kv: kv[1])[0] if leg["by_zone"] else "-"
            leg_rows.append([leg["leg"], f"{leg['from_seq']} to {leg['to_seq']}", f"{leg['length_m']:.1f}",
                             format_prob(leg["p_incident"]),
                             f"{100 * leg['p_incident'] / total:.0f}%" if total > 0 else "-", zone])
        if rest > 0:
            leg_rows.append(["others", f"{len(legs) - len(listed)} legs", "", format_prob(rest),
                             f"{100 * rest / total:.0f}%" if total > 0 else "-", ""])
        leg_rows.append(["sum", f"{len(legs)} leg{'s' if len(legs) != 1 else ''}", "", format_prob(sum(leg["p_incident"] for leg in legs)),
                         "100%" if total > 0 else "-", ""])
        single = ("The route is one straight leg, so the decomposition says only that all of it comes from that "
                  "leg; the failure paths say where along it." if len(legs) == 1 else "")
        out += [subhead(f"{ROUTE_WORDS.get(name, name)} route: P(incident) {format_prob(total)}"),
                table(["leg", "waypoints", "leg length (m)", "P(incident) last on the route here", "share",
                       "main zone"], leg_rows, numeric=(2, 3, 4), small=True)]
        if single:
            out.append(para(single, small=True))
        if c["paths"]:
            path_rows = [[k + 1, f["zone"], format_prob(f["probability"]), f["moves"], f["left_route_leg"],
                          moves_text(f)] for k, f in enumerate(c["paths"])]
            out.append(table(["#", "ends in", "probability of this path", "moves", "last on the route on leg",
                              "where noise or drift acted"], path_rows, numeric=(2, 3, 4), small=True))
        else:
            out.append(para("No failure path worth listing: every zone is reached with a negligible probability.",
                            small=True))
    out.append(figure("failure-paths.png", "failure paths and leg shares",
                      "For each route: the likeliest failure paths on the map (numbered as in the tables, the moves "
                      "where noise or drift acted circled) and, below it, P(incident) by leg."))
    return out


__all__ = ["budget_policy", "budget_words", "section_budget", "set_by_words"]
