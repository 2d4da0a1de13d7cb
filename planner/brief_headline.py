"""What the briefing and ``plan``'s summary say of each route: its headline figures, in words.

Part of the briefing stage (:mod:`planner.brief`). A route's length and how it ends,
its P(incident) with the range over the training runs and over equally good
tie-breaks, how the cautious route compares with the shortest, how much each learner
trained, and the banner raised when the training runs disagree. The terminal summary
of ``plan`` states the same figures through these functions, so the two cannot word
them differently. No computation beyond formatting.
"""

from __future__ import annotations

import math

from planner import notation, style
from planner.risk import format_prob
from planner.risk_table import three_level_words

#: The two learned policies, in the order the briefing shows them (the third route, with
#: ``--risk-budget``, is in :mod:`planner.brief_budget`).
POLICIES = tuple(style.POLICY)

#: The exact reference each learned policy should match once training has converged.
REFERENCE_OF = {"cautious": "exact on-policy", "shortest": "exact optimal"}

#: How each learner is named for a reader.
METHOD = {"cautious": "SARSA (on-policy)", "shortest": "Q-learning (off-policy)"}


def metres_text(value) -> str:
    """A distance in metres to one decimal, or "-" when there is none."""
    return "-" if value is None or not math.isfinite(value) else f"{value:.1f}"


def _times(ratio: float) -> str:
    """A ratio rounded to two significant figures, in words a reader takes in at once."""
    return notation.times(ratio)


def count_text(n: int, word: str) -> str:
    """A count with its word: '1 hazard', '3 hazards'."""
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def route_ends(route) -> str:
    """Where a nominal route ends, in the words of the briefing and the summary."""
    if route.reached_goal:
        return "at the goal"
    if route.end_event == "boundary":
        return "OFF THE BOUNDARY"
    if route.end_event == "loop":
        return "IN A LOOP (never reaches the goal)"
    return f"IN HAZARD {route.end_event}"


def main_event(row):
    """The incident that contributes most to a row, as ``(name, probability)``, or None."""
    if row is None or not row.p_by_event:
        return None
    name, p = max(row.p_by_event.items(), key=lambda kv: kv[1])
    return (name, p) if p > 0 else None


def with_range(ref) -> str:
    """A reference's P(incident) with the range over its equally good tie-breaks."""
    text = format_prob(ref.p_incident)
    rng = ref.p_incident_range
    if rng is not None and rng[1] > rng[0]:
        words = notation.probability_range(*rng)
        if words != text:  # a range too narrow to print is no range to the reader
            text += f" (equally good routes: {words})"
    return text


def usable_cells(grid) -> str:
    """The count of usable cells as ``veerwise check`` prints it.

    Every cell the vehicle can be in, goal cells included.
    """
    return f"{int(grid.passable().sum()):,} usable cells, {int(grid.goal.sum()):,} of them goal"


def route_figures(name: str, route, conv: dict, row) -> dict:
    """The headline figures of one policy, as the briefing and the plan summary state them.

    ``conv`` is the policy's entry of the manifest's ``results`` (convergence verdict,
    seed counts, per-seed P(incident)); ``row`` its risk row at the headline noise and
    planning drift, or None.
    """
    lo, hi = seed_range(conv.get("p_incident_seeds"), row.p_incident if row else None)
    return {
        "name": name, "length_m": route.length_m, "reached_goal": route.reached_goal, "ends": route_ends(route),
        "p_incident": format_prob(row.p_incident) if row else "-",
        "p_incident_value": row.p_incident if row else math.nan,
        "p_incident_lo": lo, "p_incident_hi": hi, "p_incident_range": notation.probability_range(lo, hi),
        "seed_routes_matching": conv["seed_routes_matching"], "n_seeds": conv["n_seeds"],
        "seeds_disagree": conv["seed_routes_matching"] < conv["n_seeds"],
        "converged": conv["converged"], "message": conv["message"],
    }


def compare_routes(c: dict, s: dict) -> tuple[str, bool]:
    """How the cautious route compares with the shortest, and whether to alert.

    One or two sentences, and whether a reviewer must be alerted (the cautious one is
    not the less risky).

    ``c`` and ``s`` come from :func:`route_figures`; the "N times" ratio is the widest
    range the two policies' spreads over their training runs allow.
    """
    pc, ps = c["p_incident_value"], s["p_incident_value"]
    extra = c["length_m"] - s["length_m"]
    share = f" ({abs(100 * extra / s['length_m']):.0f}%)" if s["length_m"] > 0 else ""
    if not (math.isfinite(pc) and math.isfinite(ps)):
        return "", False
    if pc < ps:
        ratio = notation.ratio_range((c["p_incident_lo"], c["p_incident_hi"]),
                                     (s["p_incident_lo"], s["p_incident_hi"]))
        n_seeds = max(c["n_seeds"], s["n_seeds"])
        if pc == 0:
            odds = "never ends in an incident in the model"
        elif ratio is None:
            odds = (f"is about {_times(ps / pc)} times less likely to end in an incident in the model (some "
                    "training runs' cautious policy never ends in one)")
        elif ratio[0] < 1.0:
            odds = (f"is about {_times(ps / pc)} times less likely to end in an incident in the model; but over "
                    f"the {n_seeds} training runs of each learner the ratio ranges from {_times(ratio[0])} to "
                    f"{_times(ratio[1])}, so the runs do not agree that it is the safer route")
            longer = f"{abs(extra):.1f} m{share} {'longer' if extra >= 0 else 'shorter'}"
            return f"The cautious route is {longer} and {odds}.", True
        else:
            odds = (f"is about {notation.times_range(*ratio)} times less likely to end in an incident in the "
                    f"model (the range over the {n_seeds} training runs of each learner)")
        longer = f"{abs(extra):.1f} m{share} {'longer' if extra >= 0 else 'shorter'}"
        return f"The cautious route is {longer} and {odds}.", False
    if pc > ps:
        return (f"In the model the cautious route is NOT the less risky one here ({c['p_incident']} against "
                f"{s['p_incident']}); check the convergence verdicts before relying on it."), True
    return "Both have the same incident probability in the model.", False


def strong_range(conv: dict, strong, row) -> str:
    """P(incident) at the strongest drift over the training runs, or "-" when not recorded."""
    record = conv.get("p_incident_seeds_strong") or {}
    if strong is None or row is None or not record or not math.isclose(record.get("drift_scale", -1.0), strong):
        return "-"
    return notation.probability_range(*seed_range(record.get("values"), row.p_incident))


def seed_range(seed_values, headline) -> tuple[float, float]:
    """The range of a P(incident) over the training seeds and the exported policy's figure.

    ``seed_values`` are the per-seed figures of the manifest (may be missing in run
    folders written before they were recorded); ``headline`` the exported policy's.
    """
    values = [float(v) for v in (seed_values or ()) if v is not None and math.isfinite(float(v))]
    if headline is not None and math.isfinite(float(headline)):
        values.append(float(headline))
    return (min(values), max(values)) if values else (math.nan, math.nan)


#: What "more training" means, whichever schedule a learner used.
MORE_TRAINING = "--max-sweeps, or --episodes for the episodes schedule"


def training_text(conv: dict, n_seeds: int) -> str:
    """How much a learner trained and when its verdict turned converged, from its manifest result."""
    if conv.get("schedule") != "sweeps":
        return f"{n_seeds} x {conv.get('episodes', 0):,} episodes, {conv.get('updates', 0):.2g} updates"
    text = f"{n_seeds} x {conv.get('sweeps', 0):,} sweeps, {conv.get('updates', 0):.2g} updates"
    return text + ("; verdict converged at the last check" if conv.get("stopped_by_rule")
                   else "; verdict not converged at any check")


def seeds_banner(x: dict) -> str:
    """The banner raised when the training seeds do not agree on a policy's route."""
    return (f"SEEDS DISAGREE on the {x['name']} route: only {x['seed_routes_matching']} of {x['n_seeds']} "
            "training runs keep within 2 cells of it, so it depends on the seed, not only on the yard "
            f"(P(incident) over the runs {x['p_incident_range']}). Re-run with more training ({MORE_TRAINING}) "
            "before signing.")


def half_cell_text(row, *, short: bool = False) -> str:
    """The half-cell check of a row: '9.7e-5 at 2.25 m cells (-87%; beyond tolerance)' or why it was skipped.

    ``short``: the figure, the cell and the difference only ('9.7e-5 at 2.25 m cells, -87%').
    """
    check = row.grid_check if row is not None else None
    if not check:
        return "-"
    if check.get("skipped"):
        return f"not checked: {check['skipped']}"
    rel = check.get("relative")
    diff = f"{100 * rel:+.0f}%" if rel is not None else f"{check['difference']:+.1e}"
    if short:
        return f"{format_prob(check['p_incident_fine'])} at {check['fine_cell_m']:g} m cells, {diff}"
    verdict = "beyond tolerance: the figure depends on the cell size" if check["flagged"] else "within tolerance"
    third = three_level_words(check)
    return (f"{format_prob(check['p_incident_fine'])} at {check['fine_cell_m']:g} m cells ({diff}; {verdict})"
            + (f"; {third}" if third else ""))
