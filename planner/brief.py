"""The briefing a safety reviewer reads and signs before a field trial (HTML and PDF).

This stage owns the briefing's content and layout. It takes finished results (no
computation of its own beyond formatting), embeds every figure as a data URI so the
page needs no network and no other file, and prints well on A4.

The content is built once (:func:`brief_content`) as plain data: a box of short
answers, then numbered sections made of blocks (paragraphs, tables, figures, lists,
the sign-off). :func:`render_html` renders them through Jinja2 templates (package data
under ``planner/templates``: one base page, one partial per block kind, autoescaping
on), and :func:`write_pdf` prints that same HTML with WeasyPrint, so the two files
cannot say different things. Page layout (A4, footers, what may not break across a
page) is the templates' CSS, not code.

Why one module of about 800 lines: about 650 of them are the briefing's own sentences
and tables, one function per section, each reading the same few results; kept together,
a statement and the figure it quotes are found in one place. Rendering is the last
180 lines and can move out whole.
"""

from __future__ import annotations

import base64
import functools
import math
import re
from dataclasses import dataclass
from pathlib import Path

from planner import notation, style
from planner.budget_plan import ROUTE_NAME as BUDGET_ROUTE
from planner.errors import RunFolderError
from planner.risk import find_row, format_prob
from planner.risk_table import three_level_words

#: The two learned policies, in the order the briefing shows them (the third route, with
#: ``--risk-budget``, is in :mod:`planner.brief_budget`).
POLICIES = tuple(style.POLICY)

#: The exact reference each learned policy should match once training has converged.
REFERENCE_OF = {"cautious": "exact on-policy", "shortest": "exact optimal"}

#: How each learner is named for a reader.
METHOD = {"cautious": "SARSA (on-policy)", "shortest": "Q-learning (off-policy)"}

#: The cautions of SAFETY.md, in short, printed in every briefing.
CAUTIONS = (
    "For simulation and review only. Not approved for field operation.",
    "The site's safety rules, certified operators and local regulations take precedence over anything here.",
    "Only hazards drawn in the site file exist for the model: people, vehicles, animals and temporary "
    "obstacles do not.",
    "Execution error and drift are simple random models, independent from move to move; real errors are "
    "correlated and can be larger. The stronger-wind rows show how the answer moves, not a bound.",
    "Probabilities are exact for the model, not for the yard. Use them to compare routes, not as failure rates, "
    "and do not multiply them into a number of acceptable trials.",
    "No altitude, speed, turning, braking, battery or link limits are modelled; the model's vehicle never "
    "recovers from an incident.",
    "Rehearse the waypoints in a simulator, and walk or inspect the route and compare the site file with the "
    "yard as it is today before any trial.",
)

#: The reviewer's decisions. None approves field operation on this tool's word: a
#: supervised trial is the site's decision, under its own rules and operators.
DECISIONS = (
    "approve for simulation",
    "approve for a supervised trial under the site's rules and certified operators",
    "refuse",
)

#: The sign-off's blank fields: each label and the height (mm) left blank for it.
SIGNOFF_FIELDS = (
    ("Site file checked against the yard on (date, by whom)", 10),
    ("Rehearsed in a simulator on (date, simulator)", 10),
    ("Reviewed by (name, role)", 10),
    ("Date", 9),
    ("Conditions and remarks", 20),
    ("Signature", 13),
)

NOTICE = ("FOR SIMULATION AND REVIEW ONLY - not approved for field operation. The site's safety rules, "
          "certified operators and local regulations take precedence.")

#: Numbers a browser must not break at their minus sign (``1.2e-4``, ``1-3.0e-6``, ``-180.3``);
#: not inside words or dates (``2026-12-03T06:35:29Z`` is left as it is).
_NUMBER = re.compile(r"(?<![\w.-])-?\d[\d.,]*(?:e-\d+)?(?:-\d[\d.]*e-\d+)?")


def _metres(value) -> str:
    return "-" if value is None or not math.isfinite(value) else f"{value:.1f}"


def _times(ratio: float) -> str:
    """A ratio rounded to two significant figures, in words a reader takes in at once."""
    return notation.times(ratio)


def _count(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def _compass(deg: float) -> str:
    return ("N", "NE", "E", "SE", "S", "SW", "W", "NW")[int((deg % 360.0) / 45.0 + 0.5) % 8]


def _ends(route) -> str:
    if route.reached_goal:
        return "at the goal"
    if route.end_event == "boundary":
        return "OFF THE BOUNDARY"
    if route.end_event == "loop":
        return "IN A LOOP (never reaches the goal)"
    return f"IN HAZARD {route.end_event}"


def _main_event(row):
    """The incident that contributes most to a row, as ``(name, probability)``, or None."""
    if row is None or not row.p_by_event:
        return None
    name, p = max(row.p_by_event.items(), key=lambda kv: kv[1])
    return (name, p) if p > 0 else None


# ----------------------------------------------------------------------------- blocks


def _para(text: str, *, small: bool = False, alert: bool = False) -> dict:
    return {"kind": "para", "text": text, "small": small, "alert": alert}


def _subhead(text: str) -> dict:
    return {"kind": "subhead", "text": text}


#: Tables with at most this many rows are kept on one page when they fit on one.
KEEP_ROWS = 24


def _table(headers, rows, *, numeric=(), small: bool = False, narrow: bool = False, alerts=()) -> dict:
    rows = [[str(v) for v in r] for r in rows]
    return {"kind": "table", "headers": [str(h) for h in headers], "rows": rows, "numeric": tuple(numeric),
            "keep": len(rows) <= KEEP_ROWS, "small": small, "narrow": narrow, "alerts": {tuple(a) for a in alerts}}


def _figure(file: str, alt: str, caption: str) -> dict:
    return {"kind": "figure", "file": file, "alt": alt, "caption": caption}


def _list(items, *, keep: bool = False) -> dict:
    return {"kind": "list", "items": [str(i) for i in items], "keep": keep}


@dataclass(frozen=True)
class BriefInputs:
    """What the briefing is made from: a finished plan, or a run folder read back.

    ``manifest`` is the run's manifest (its ``results`` hold each policy's convergence
    report); ``routes`` maps policy name to ``planner.route.Route``; ``risk_rows`` are
    ``planner.risk.RiskRow``; ``folder`` holds the figures to embed.
    """

    folder: Path
    site: object
    grid: object
    routes: dict
    risk_rows: list
    settings: object
    manifest: dict
    run_name: str = ""
    #: ``--risk-budget``: the budget record and each route's causes
    #: (``planner.budget_plan.budget_record`` / ``explain_route``); None and {} without
    budget: dict | None = None
    causes: dict = None


def brief_content(inputs: BriefInputs) -> dict:
    """Everything the briefing states, as plain data shared by the HTML and the PDF.

    Parameters
    ----------
    inputs : the finished plan (see :class:`BriefInputs`).

    Returns
    -------
    dict
        ``site``, ``created``, ``run_name``, ``noise`` (the headline execution noise),
        ``drift_scale`` (the planning drift scale) and ``strong_drift`` (the largest
        drift scale tabulated above it, or None); ``policies`` (one dict of headline
        figures per policy, probabilities already formatted by
        ``planner.risk.format_prob``); ``converged``; ``assumptions`` and ``warnings``;
        ``notice`` and ``banners`` (strings); ``glance`` (question, answer, alert)
        triples; ``sections``: each a ``title`` and a list of ``blocks`` (dicts with a
        ``kind`` of ``para``, ``subhead``, ``table``, ``figure``, ``list``, ``signed``
        (what the sign-off binds to) or ``signoff``).
    """
    settings, manifest = inputs.settings, inputs.manifest
    site = inputs.site
    dyn, learn = settings.dynamics, settings.learn
    eps = float(learn.epsilon)
    base = float(dyn.drift_scale)
    rows = list(inputs.risk_rows)
    scales = sorted({float(r.drift_scale) for r in rows})
    strong = scales[-1] if scales and scales[-1] > base and not math.isclose(scales[-1], base) else None

    policies = []
    for name in POLICIES:
        route, conv = inputs.routes[name], manifest["results"][name]
        row = find_row(rows, name, eps, base)
        row_strong = find_row(rows, name, eps, strong) if strong is not None else None
        ref = find_row(rows, REFERENCE_OF[name], eps, base)
        main = _main_event(row)
        policies.append({
            **route_figures(name, route, conv, row),
            "method": METHOD[name], "moves": route.n_moves, "waypoints": len(route.waypoints),
            "waypoint_length_m": route.waypoint_length_m, "end_event": route.end_event,
            "min_clearance_m": route.min_clearance_m, "min_clearance_hazard": route.min_clearance_hazard,
            "p_incident_strong": format_prob(row_strong.p_incident) if row_strong else "-",
            "p_incident_strong_range": _strong_range(conv, strong, row_strong),
            "p_goal": format_prob(row.p_goal) if row else "-",
            "p_incident_reference": _with_range(ref) if ref else "-",
            "delivered": conv.get("delivered", "learned"),
            "half_cell": _half_cell(row),
            "half_cell_short": _half_cell(row, short=True),
            "half_cell_flagged": bool(row and row.grid_check and row.grid_check.get("flagged")),
            "expected_m": row.expected_m if row else math.nan,
            "main_event": f"{main[0]} ({format_prob(main[1])})" if main else "none",
            "agreement": conv["agreement"],
            "value_gap_m": math.inf if conv["value_gap_m"] is None else conv["value_gap_m"],
            "episodes": conv.get("episodes", learn.episodes),
            "training": training_text(conv, conv.get("n_seeds", learn.n_seeds)),
        })
    p = {x["name"]: x for x in policies}
    content = {
        "site": site.name, "site_sha256": site.sha256, "version": manifest["versions"]["veerwise"],
        "run_id": manifest["run_id"], "created": manifest["created_utc"], "run_name": inputs.run_name or inputs.folder.name,
        "noise": eps, "drift_scale": base, "strong_drift": strong, "policies": policies,
        "converged": all(x["converged"] for x in policies),
        "assumptions": _assumptions(inputs, eps), "warnings": list(manifest.get("warnings", [])),
        "notice": NOTICE,
    }
    content["banners"] = _banners(policies)
    budget = inputs.budget if inputs.budget is not None and BUDGET_ROUTE in inputs.routes else None
    content["budget"] = budget
    if budget is not None:
        from planner.brief_budget import budget_policy
        from planner.budget_plan import budget_text

        content["budget_route"] = budget_policy(budget, inputs.routes[BUDGET_ROUTE],
                                                find_row(rows, BUDGET_ROUTE, eps, base))
        if not budget["met"]:
            content["banners"].append("RISK BUDGET NOT MET: no route meets P(incident) at most "
                                      f"{budget_text(budget['budget'], format_prob)}; §budget says how close the least risky "
                                      "one comes.")
    content["glance"] = _glance(inputs, content, p, rows)
    content["sections"] = [
        {"title": "1. The two routes", "blocks": _section_routes(content, p)},
        {"title": "2. Risk under worse execution and stronger wind", "blocks": _section_risk(content, rows)},
        {"title": "3. Is the answer trustworthy?", "blocks": _section_trust(content, rows)},
        {"title": "4. Waypoints and clearances", "blocks": _section_waypoints(inputs)},
        {"title": "5. Site and assumptions", "blocks": _section_site(inputs, content)},
        {"title": "6. Cautions (from SAFETY.md, in short)", "blocks": [_list(CAUTIONS, keep=True)]},
        # one piece, never split across pages: what is signed, then the signature
        {"title": "7. Sign-off", "keep": True, "blocks": _section_signoff(inputs, content)},
    ]
    if budget is not None:
        from planner.brief_budget import section_budget

        makers = {"para": _para, "subhead": _subhead, "table": _table, "figure": _figure}
        content["sections"].insert(1, {"title": "2. The route within the risk budget, and why each route is risky",
                                       "blocks": section_budget(content, budget, inputs.causes or {}, inputs.routes,
                                                                rows, makers)})
        content["sections"][0]["title"] = "1. The cautious and the shortest route"
        for k, section in enumerate(content["sections"][2:], start=3):
            section["title"] = f"{k}." + section["title"].split(".", 1)[1]
        _renumber(content)
    return content


_SECTION_REF = re.compile(r"\b([Ss]ection) ([2-7])\b")
#: Where the budget's own text points to its section and to the risk table's.
_BUDGET_REFS = {"§budget": "section 2", "§risk": "section 3"}


def _renumber_text(text):
    if not isinstance(text, str):
        return text
    text = _SECTION_REF.sub(lambda m: f"{m[1]} {int(m[2]) + 1}", text)
    for mark, words in _BUDGET_REFS.items():
        text = text.replace(mark, words)
    return text


def _renumber(content: dict) -> None:
    """Point every "section N" of the briefing past the budget's section 2 (inserted after the rest was written)."""
    content["glance"] = [(q, _renumber_text(a), alert) for q, a, alert in content["glance"]]
    content["banners"] = [_renumber_text(b) for b in content["banners"]]

    def fix(block):
        for key in ("text", "caption"):
            if key in block:
                block[key] = _renumber_text(block[key])
        if "rows" in block:
            block["rows"] = [[_renumber_text(v) for v in r] for r in block["rows"]]
        if block.get("kind") == "list":
            block["items"] = [_renumber_text(i) for i in block["items"]]
        if block.get("kind") == "signed":
            block["items"] = [(label, _renumber_text(v), h) for label, v, h in block["items"]]
            fix(block["routes"])

    for section in content["sections"]:
        for block in section["blocks"]:
            fix(block)


def _with_range(ref) -> str:
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
        "name": name, "length_m": route.length_m, "reached_goal": route.reached_goal, "ends": _ends(route),
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


def _strong_range(conv: dict, strong, row) -> str:
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
def _section_signoff(inputs: BriefInputs, content: dict) -> list:
    """What is signed (run, site file, routes with their files' hashes), then the fields to fill in."""
    manifest, files = inputs.manifest, inputs.manifest.get("files", {})
    eps, base = content["noise"], content["drift_scale"]
    routes = []
    for x in content["policies"]:
        name = x["name"]
        digest = files.get(f"routes-{name}.geojson")
        routes.append([f"{name} route", f"{x['waypoint_length_m']:.1f} m, {x['waypoints']} waypoints, ends {x['ends']}",
                       x["p_incident"], x["delivered"],
                       f"routes-{name}.geojson" + (f" (sha256 {digest[:16]}...)" if digest else "")])
    alerts = [(k, 3) for k, x in enumerate(content["policies"]) if not x["converged"]]
    budget = content.get("budget")
    fields = list(SIGNOFF_FIELDS)
    budget_items = []
    if budget is not None:
        from planner.brief_budget import budget_words, set_by_words

        x = content["budget_route"]
        digest = files.get("routes-budget.geojson")
        routes.append(["within-budget route", f"{x['waypoint_length_m']:.1f} m, {x['waypoints']} waypoints, ends "
                       f"{_ends(inputs.routes['budget'])}", x["p_incident"], x["delivered"],
                       "routes-budget.geojson" + (f" (sha256 {digest[:16]}...)" if digest else "")])
        if not budget["met"]:
            alerts.append((len(routes) - 1, 3))
        budget_items.append(("Risk budget", f"{budget_words(budget)}; {set_by_words(budget)}"
                             + ("" if budget["met"] else "; NO ROUTE MEETS IT"), False))
        if not budget.get("set_by"):
            # the budget is the reviewer's limit: who set it is written in by hand when plan was not told
            fields.insert(0, ("Risk budget set by (name, role)", 10))
    signed = {
        "kind": "signed", "title": "What is signed",
        "items": [
            ("Run", f"run id {content['run_id']}: folder {content['run_name']}, made {content['created']} by "
                    f"veerwise {content['version']}", False),
            ("Site file", f"{Path(manifest['input']['site']).name} ('{content['site']}'), sha256", False),
            ("", content["site_sha256"], True),
            ("Figures for", f"execution noise {eps:g}, drift x{base:g}; every setting in section 5 and "
                            "manifest.json", False),
            *budget_items,
        ],
        "routes": _table(["delivered route", "as flown by its waypoints", f"P(incident), noise {eps:g}",
                          "policy delivered", "waypoint file"], routes, alerts=alerts, small=True),
    }
    blocks = []
    if not content["converged"]:
        blocks.append(_para("NOT CONVERGED: the learned " + " and ".join(
            x["name"] for x in content["policies"] if not x["converged"]) + " route must not be signed; this "
            "briefing is not ready for review.", alert=True))
    blocks += [
        _para("To be completed by the person responsible for the trial. This tool approves nothing for field "
              "operation: a decision below is the reviewer's, under the site's safety rules, with its certified "
              "operators and within local regulations.", small=True),
        signed,
        {"kind": "signoff",
         "choices": [("Route (tick one)", [r[0] + f" ({r[1].split(',')[0]})" for r in routes]),
                     ("Decision (tick one)", list(DECISIONS))],
         "fields": fields},
    ]
    return blocks


def _banners(policies) -> list[str]:
    out = []
    bad = [x for x in policies if not x["converged"]]
    for x in bad:
        out.append(f"NOT CONVERGED: the learned {x['name']} policy's risk does not agree with its exact reference "
                   f"({x['message']}). The learned {x['name']} route must not be signed; re-run with more "
                   f"training ({MORE_TRAINING}).")
    out += [seeds_banner(x) for x in policies if x["seeds_disagree"]]
    for x in policies:
        if not x["reached_goal"]:
            out.append(f"The {x['name']} nominal route does not reach the goal: it ends {x['ends']}.")
    return out


def _glance(inputs: BriefInputs, content: dict, p: dict, rows) -> list[tuple[str, str, bool]]:
    """Short answers to the four questions a reviewer asks, each with an alert flag."""
    site, grid, settings = inputs.site, inputs.grid, inputs.settings
    dyn = settings.dynamics
    eps, base, strong = content["noise"], content["drift_scale"], content["strong_drift"]
    c, s = p["cautious"], p["shortest"]

    def clearance(x):
        if not x["min_clearance_hazard"]:
            return "no hazards on the site"
        return f"closest approach {_metres(x['min_clearance_m'])} m to {x['min_clearance_hazard']}"

    which = (f"Two candidate routes from '{site.start_name}' to '{site.goal_name}': the cautious route, "
             f"{c['length_m']:.1f} m ({clearance(c)}), and the shortest route, {s['length_m']:.1f} m "
             f"({clearance(s)}).")
    compared, worse = compare_routes(c, s)
    which += f" {compared}" if compared else ""
    which_alert = worse or not (c["reached_goal"] and s["reached_goal"])
    budget = content.get("budget")
    if budget is not None:
        from planner.brief_budget import budget_words

        b = content["budget_route"]
        if budget["met"]:
            which += (f" A third, the within-budget route, is the shortest whose P(incident) stays within the budget "
                      f"({budget_words(budget)}): {b['length_m']:.1f} m, P(incident) {b['p_incident']} (§budget).")
        else:
            which += (f" No route meets the risk budget ({budget_words(budget)}): the least P(incident) any route "
                      f"achieves is {format_prob(budget['least_p_incident'])} (§budget).")
            which_alert = True
    which += " Choosing between them is the reviewer's decision."

    drift_words = "as drawn (the forecast)" if math.isclose(base, 1.0) else f"at {base:g} x the drawn strength"
    risky = (f"P(incident) is the chance, in the model, that one run ends in a hazard or off the boundary before "
             f"the goal. With {100 * eps:g}% of moves made in a random direction and drift {drift_words}: "
             f"cautious {c['p_incident']}, shortest {s['p_incident']}. Over the training runs of each learner: "
             f"cautious {c['p_incident_range']}, shortest {s['p_incident_range']}.")
    if strong is not None:
        risky += (f" With drift {'twice' if strong == 2 else f'{strong:g} times'} as strong: "
                  f"cautious {c['p_incident_strong']}, "
                  f"shortest {s['p_incident_strong']}")
        if c["p_incident_strong_range"] != "-":
            risky += (f"; over the training runs cautious {c['p_incident_strong_range']}, shortest "
                      f"{s['p_incident_strong_range']}")
        risky += "."
    risky += " These figures compare routes; they are not field failure rates."

    ending = sum(1 for h in site.hazards if h.ends_run)
    width, height = site.extent_m
    assume = (f"The site: centre {notation.hemisphere(site.centre_lonlat[1], site.centre_lonlat[0])} (WGS 84), "
              f"{width:.0f} m east-west x {height:.0f} m north-south. "
              f"A grid of {grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m; {dyn.n_actions} headings, "
              f"one decision every {dyn.move_length_m(grid.cell_m):g} m; a move veers to a neighbouring heading "
              f"with probability {dyn.slip:g}"
              + (f" and stalls with probability {dyn.stall:g}" if dyn.stall else "")
              + f"; {_count(len(site.drifts), 'drift zone')} as drawn"
              + ("" if math.isclose(base, 1.0) else f" x {base:g}")
              + f"; {_count(len(site.hazards), 'hazard')}, {ending} of which end the run; leaving the boundary "
              + ("ends the run" if dyn.edge == "boundary" else "is blocked")
              + ". Only what the site file draws exists for the model. Section 5 lists every setting.")

    bad = [x for x in (c, s) if not x["converged"]]
    if bad:
        trust = ("NO. Not converged: the " + " and ".join(
            f"{x['name']} policy's own P(incident) is {x['p_incident']} against {x['p_incident_reference']} for "
            "its exact reference" for x in bad) + f": do not sign the learned route; re-run with more training "
                                                  f"({MORE_TRAINING}).")
    else:
        trust = (f"Training converged for both policies ({100 * c['agreement']:.1f}% and "
                 f"{100 * s['agreement']:.1f}% agreement with the exact solution of the same model).")
    checked = [r for r in rows if r.n_rollouts > 0]
    flagged = [r for r in checked if r.mc_disagrees]
    if not checked:
        trust += " No Monte Carlo cross-check was run."
    elif not flagged:
        trust += (f" The Monte Carlo cross-check ({checked[0].n_rollouts:,} simulated runs per row) agrees with the "
                  f"exact figures in all {len(checked)} rows of the risk table.")
    else:
        trust += (f" The Monte Carlo cross-check disagrees with an exact figure in {len(flagged)} of "
                  f"{len(checked)} rows of the risk table (marked '!' in section 2, named in section 3).")
    never = max((r.p_never for r in rows if math.isfinite(r.p_never)), default=0.0)
    if never > 0:
        trust += f" Under some settings a run can loop forever (probability up to {format_prob(never)})."
    split = [x for x in (c, s) if x["seeds_disagree"]]
    for x in split:
        trust += (f" But the training runs disagree on the {x['name']} route: only {x['seed_routes_matching']} of "
                  f"{x['n_seeds']} keep within 2 cells of it, so it is not yet a property of the yard alone.")
    coarse = [x for x in (c, s) if x["half_cell_flagged"]]
    if coarse:
        trust += (" The grid check differs beyond its tolerance for the " + " and ".join(
            f"{x['name']} route ({x['p_incident']} here, {x['half_cell_short']})" for x in coarse) + ": the figure still depends on how finely "
            "the site is drawn; re-run with a smaller --cell before relying on it.")
    trust += " The figures are exact for the model only (section 6)."
    return [("Which route?", which, which_alert), ("How risky?", risky, False),
            ("Under what assumptions?", assume, False),
            ("Is the answer trustworthy?", trust, bool(bad) or bool(split) or never > 0 or bool(coarse))]


def _half_cell(row, *, short: bool = False) -> str:
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


def _section_routes(content: dict, p: dict) -> list:
    eps, base, strong = content["noise"], content["drift_scale"], content["strong_drift"]
    c, s = p["cautious"], p["shortest"]

    def both(key, fmt=str):
        return [fmt(c[key]), fmt(s[key])]

    def clearance(x):
        return (f"{_metres(x['min_clearance_m'])} m ({x['min_clearance_hazard']})" if x["min_clearance_hazard"]
                else "no hazards")

    rows = [
        ["learned by", *both("method")],
        ["nominal route ends", *both("ends")],
        ["route length along the cells (m)", *both("length_m", lambda v: f"{v:.1f}")],
        ["route length along the waypoints (m)", *both("waypoint_length_m", lambda v: f"{v:.1f}")],
        ["moves / waypoints", f"{c['moves']} / {c['waypoints']}", f"{s['moves']} / {s['waypoints']}"],
        ["closest approach to a hazard", clearance(c), clearance(s)],
        [f"P(incident), noise {eps:g}, drift x{base:g}", *both("p_incident")],
        ["P(incident) over the training runs (range)", *both("p_incident_range")],
        ["the same policy re-evaluated at half the cell size", *both("half_cell")],
    ]
    half_row = len(rows) - 1
    if strong is not None:
        rows.append([f"P(incident), noise {eps:g}, drift x{strong:g}", *both("p_incident_strong")])
        if c["p_incident_strong_range"] != "-":
            rows.append([f"P(incident), drift x{strong:g}, over the training runs (range)",
                         *both("p_incident_strong_range")])
    rows += [
        [f"P(goal), noise {eps:g}, drift x{base:g}", *both("p_goal")],
        ["most likely incident (probability)", *both("main_event")],
        ["mean distance travelled in runs that reach the goal (m)", *both("expected_m", _metres)],
        ["training", *["converged" if x["converged"] else "NOT CONVERGED" for x in (c, s)]],
    ]
    alerts = [(len(rows) - 1, k + 1) for k, x in enumerate((c, s)) if not x["converged"]]
    alerts += [(1, k + 1) for k, x in enumerate((c, s)) if not x["reached_goal"]]
    alerts += [(half_row, k + 1) for k, x in enumerate((c, s)) if x["half_cell_flagged"]]
    return [
        _table(["", "cautious route", "shortest route"], rows, alerts=alerts),
        _para(f"Nominal route: the path each policy intends (its planned move and the most likely outcome of each "
              f"move), from cell centre to cell centre; the waypoints simplify it without coming closer to any "
              f"hazard than the cells do, so their length is a little shorter. Noise {eps:g}: {100 * eps:g}% of moves are made in a random direction, on top of slip. "
              f"Drift x1: drift zones as drawn (the forecast); x2: twice as strong. Closest approach: distance "
              f"from the waypoint legs to a hazard as drawn, buffers not included.", small=True),
        _figure("routes.png", "map with both routes",
                "Site, zones, drift arrows (mean push over one cell of travel, drawn above the routes) and both "
                "nominal routes with their waypoints; hazards that end the run are hatched. Distances in metres."),
    ]


def _check_label(key: str) -> str:
    """A Monte Carlo key of ``RiskRow.mc`` in words."""
    words = {"goal": "P(goal)", "incident": "P(incident)", "never": "P(never ends)",
             "goal_within_budget": "P(goal within budget)", "incident_within_budget": "P(incident within budget)",
             "timeout": "P(timeout)"}
    if key.startswith("event:"):
        return f"P(ends in {key[6:]})"
    if key.startswith("entry:"):
        return f"P(enters {key[6:]})"
    return words.get(key, key)


def _disagreements(row) -> str:
    """What a row's Monte Carlo check flags: each quantity with its exact and simulated figure."""
    exact = row.exact()
    return "; ".join(f"{_check_label(k)}: exact {format_prob(exact.get(k))}, simulated {row.mc[k].count:,} of "
                     f"{row.mc[k].n:,}" for k in row.mc_disagrees if k in row.mc)


def _section_risk(content: dict, rows) -> list:
    base = content["drift_scale"]
    blocks = [_para(
        "P(incident): probability, in the model, that one run ends in a hazard that ends the run or by leaving "
        "the boundary before it reaches the goal. Noise: share of moves made in a uniformly random direction "
        "instead of the planned one. Drift xN: every drift zone pushes N times as hard as drawn. Exact figures "
        "come from the absorbing Markov chain of each policy; Monte Carlo estimates (simulated runs, shown with "
        "their Clopper-Pearson 95% interval) check the computation.", small=True)]

    def mark(row):
        return " !" if row.mc_disagrees else ""

    learned = [r for r in rows if r.policy in POLICIES and math.isclose(r.drift_scale, base)]
    if learned:
        table = []
        for r in learned:
            inc = r.mc.get("incident")
            mc = (f"{format_prob(inc.estimate)} [{notation.percent(inc.lo)} to {notation.percent(inc.hi)}]"
                  if inc else "-")
            main = _main_event(r)
            check = "not run" if not r.mc else ("! (section 3)" if r.mc_disagrees else "agrees")
            table.append([r.policy, f"{r.noise:g}", format_prob(r.p_goal), format_prob(r.p_incident), mc,
                          f"{main[0]} ({format_prob(main[1])})" if main else "none", check])
        blocks += [_subhead(f"Learned routes at drift x{base:g}"),
                   _table(["policy", "noise", "P(goal)", "P(incident)", "Monte Carlo P(incident) [95% interval]",
                           "most likely incident", "Monte Carlo check"], table, numeric=(1, 2, 3), alerts=[
                               (k, 6) for k, r in enumerate(learned) if r.mc_disagrees])]

    scales = sorted({float(r.drift_scale) for r in rows})
    names = list(dict.fromkeys(r.policy for r in rows))
    noises = sorted({float(r.noise) for r in rows})
    pivot = []
    for name in names:
        for n in noises:
            cells = []
            for m in scales:
                r = find_row(rows, name, n, m)
                cells.append(format_prob(r.p_incident) + mark(r) if r else "-")
            if any(v != "-" for v in cells):
                pivot.append([name, f"{n:g}", *cells])
    if pivot:
        blocks += [_subhead("P(incident) when the wind is stronger than forecast"),
                   _table(["policy", "noise", *[f"drift x{m:g}" for m in scales]], pivot,
                          numeric=tuple(range(1, 2 + len(scales))), narrow=True)]
    notes = []
    if any(r.policy in REFERENCE_OF.values() for r in rows):
        notes.append("'exact on-policy' and 'exact optimal' are the policies of the exact solutions of the same "
                     "model; the learned cautious and shortest policies should behave like them once training "
                     "has converged.")
    if any(r.mc_disagrees for r in rows):
        notes.append("'!' marks a row where some exact figure (P(incident), P(goal) or one hazard's share) lies "
                     "outside the Clopper-Pearson interval of its Monte Carlo count, at the level that keeps the "
                     "whole table's checks at 95% together; section 3 names it.")
    never = [r for r in rows if r.p_never > 0]
    if never:
        worst = max(never, key=lambda r: r.p_never)
        notes.append(f"In {len(never)} row(s) a run can loop forever without ending; the largest such "
                     f"probability is {format_prob(worst.p_never)} ({worst.policy}, noise {worst.noise:g}, drift "
                     f"x{worst.drift_scale:g}).")
    else:
        notes.append("In every row each run ends, at the goal or in an incident (P(never ends) = 0).")
    notes.append("risk.csv in the run folder holds every row with each hazard's share, expected moves and the "
                 "Monte Carlo counts.")
    blocks.append(_para(" ".join(notes), small=True))
    blocks += [
        _figure("sensitivity.png", "sensitivity chart",
                "P(incident) against execution noise on a log scale, the learned policies and the exact references "
                "in panels of their own; thicker lines for the strongest drift tabulated; values under 1 in 10^12 "
                "drawn with open markers on a floor line of their own."),
        _figure("riskmap.png", "risk maps",
                f"If the vehicle were here: P(incident before the goal) of a run from each cell, at noise "
                f"{content['noise']:g} and drift x{base:g}, on a log colour scale, with each policy's nominal route. "
                "Hazards that end the run are hatched white, apart from the scale."),
    ]
    return blocks


def _section_trust(content: dict, rows) -> list:
    table, alerts = [], []
    for k, x in enumerate(content["policies"]):
        if not x["converged"]:
            alerts.append((k, 1))
        table.append([x["name"], "converged" if x["converged"] else "NOT CONVERGED", f"{100 * x['agreement']:.1f}%",
                      _metres(x["value_gap_m"]), f"{x['seed_routes_matching']} of {x['n_seeds']}",
                      f"{x['p_incident']} / {x['p_incident_reference']}", x["training"]])
    blocks = [
        _table(["policy", "training", "agreement with exact", "value gap at start (m-equiv.)",
                "seed routes within 2 cells", f"P(incident) learned / exact, noise {content['noise']:g}",
                "training (seeds x budget, updates)"], table, numeric=(2, 3), alerts=alerts),
        _list([f"{x['name']} (delivered: {x['delivered']}): {x['message']}" for x in content["policies"]]),
        _para("Verdict: a learned policy is converged only when its own exact P(incident) lies within its exact "
              "reference's range over equally good tie-breaks, widened by 10 % or the Monte Carlo 99 % interval "
              "(whichever is wider), and its expected length is within 1 % of the reference's. Ties are broken "
              "by safety: among actions within the tie tolerance of the best, the one with the least P(incident) "
              "at the run's noise.", small=True),
        _para("Agreement: share of the states the policy visits (weighted by how often) where its action is optimal "
              "for the exact solution of the same model (value iteration). Value gap: how much worse, in "
              "metres-equivalent, the learned policy is at the start than the exact one. Seed routes: independent "
              "training runs whose own route stays within two cells of the exported one.", small=True),
    ]
    checked = [r for r in rows if r.n_rollouts > 0]
    flagged = [r for r in checked if r.mc_disagrees]
    residual = max((r.residual for r in rows if math.isfinite(r.residual)), default=math.nan)
    text = []
    if checked:
        text.append(f"Monte Carlo: {len(checked)} rows checked with {checked[0].n_rollouts:,} simulated runs each; "
                    + ("every exact figure lies inside the Clopper-Pearson interval of its count at the "
                       "table's level." if not flagged else
                       f"{len(flagged)} row(s) have an exact figure outside the Clopper-Pearson interval of its "
                       "count at the table's level: "
                       + "; ".join(f"{r.policy}, noise {r.noise:g}, drift x{r.drift_scale:g} ({_disagreements(r)})"
                                   for r in flagged)
                       + ". Where an exact figure is far below 1 / (simulated runs), a single simulated event is "
                         "enough to raise the flag."))
    else:
        text.append("Monte Carlo: not run (rollouts 0).")
    if math.isfinite(residual):
        text.append(f"Largest relative residual of the linear solves behind the risk table: {residual:.1e}.")
    text.append("Agreement between exact figures and simulated runs shows the arithmetic is right for the model; "
                "it says nothing about whether the model matches the yard.")
    blocks.append(_para(" ".join(text)))
    blocks.append(_figure("learning.png", "learning curves",
                          "Learners trained in episodes: return per episode (moving average; line = mean over "
                          "seeds, band = range) and the share of training episodes that ended in an incident. "
                          "Learners trained in sweeps: each seed's greedy value at the start (line = mean, band = "
                          "range over seeds) and the exact P(incident) of the delivered policy at each check of "
                          "the risk verdict, against the updates made. Values are minus costs in "
                          "metres-equivalent."))
    return blocks


def _section_waypoints(inputs: BriefInputs) -> list:
    blocks = [_para("Waypoints as written to routes-*.geojson and waypoints-*.csv (simulation only). Clearance: "
                    "distance from the waypoint to the nearest hazard as drawn, buffers not included. Latitude and "
                    "longitude in degrees (WGS 84).", small=True)]
    for name in (*POLICIES, *([BUDGET_ROUTE] if BUDGET_ROUTE in inputs.routes and inputs.budget is not None else [])):
        route = inputs.routes[name]
        wrows = [[w.seq, f"{w.east_m:.1f}", f"{w.north_m:.1f}", f"{w.lat:.7f}", f"{w.lon:.7f}", f"{w.leg_m:.1f}",
                  f"{w.cumulative_m:.1f}", _metres(w.clearance_m), w.nearest_hazard or "-"] for w in route.waypoints]
        blocks.append(_subhead(f"{'within-budget' if name == 'budget' else name} route: {len(route.waypoints)} waypoints, {route.waypoint_length_m:.1f} m "
                               f"(cell path {route.length_m:.1f} m), ends {_ends(route)}; closest approach "
                               f"{_metres(route.min_clearance_m)} m"
                               + (f" to {route.min_clearance_hazard}" if route.min_clearance_hazard else "")))
        blocks.append(_table(["#", "east (m)", "north (m)", "lat (deg)", "lon (deg)", "leg (m)", "total (m)",
                              "clearance (m)", "nearest hazard"], wrows, numeric=range(8), small=True))
    return blocks


def _section_site(inputs: BriefInputs, content: dict) -> list:
    site, grid, manifest = inputs.site, inputs.grid, inputs.manifest
    width, height = site.extent_m
    frame = ("local transverse Mercator centred on the site" if site.frame.kind == "local-tmerc" else site.frame.crs)
    summary = [
        ["site", site.name],
        ["site file", f"{Path(manifest['input']['site']).name}, sha256 {site.sha256[:16]}... (full hash in "
                      "manifest.json)"],
        ["site centre", f"{notation.hemisphere(site.centre_lonlat[1], site.centre_lonlat[0])} (WGS 84)"],
        ["extent", f"{width:.0f} m east-west x {height:.0f} m north-south; {usable_cells(grid)}"],
        ["start / goal", f"'{site.start_name}' / '{site.goal_name}'"],
        ["working frame", f"{frame}; largest scale distortion {site.scale_distortion:.1e}"],
    ]
    penalties = manifest.get("model", {}).get("hazard_penalty_m", [])
    zones = []
    hazard_index = 0
    for zone in site.zones:
        if zone.role == "hazard":
            what = "ends the run" if zone.ends_run else "run goes on; costs its penalty per crossing"
            if zone.buffer_m > 0:
                what += f"; buffer {zone.buffer_m:g} m"
            if hazard_index < len(penalties):
                what += f"; penalty {penalties[hazard_index]:g} m-equiv."
            hazard_index += 1
        elif zone.role == "rough":
            what = f"moves starting here cost {zone.cost_factor:g} x their length"
        else:
            what = (f"pushes toward {zone.toward_deg:.0f} deg ({_compass(zone.toward_deg)}) by {zone.drift_per_m:g} m per "
                    f"metre travelled, spread {zone.spread_per_sqrt_m:g} m per square-root metre, "
                    f"on {100 * zone.chance:g}% of moves")
        zones.append([zone.name, zone.role, what])
    blocks = [_table(["", ""], summary)]
    if zones:
        blocks += [_subhead("Zones as modelled"), _table(["zone", "kind", "as modelled"], zones)]
    blocks += [_subhead("Model, learning and risk settings"), _table(["setting", "value"], content["assumptions"])]
    if content["warnings"]:
        blocks += [_subhead("Warnings raised while planning"), _list(content["warnings"])]
    return blocks


def _sweeps_text(result: dict, learn) -> str:
    """The sweeps schedule of one learner, for the assumptions table."""
    from planner.learn import SWEEP_DECAY

    horizon = result.get("sweep_horizon")
    step = (f"step {horizon:g} / ({horizon:g} + n - 1)" if horizon else
            f"step n^-{learn.step_decay if learn.step_decay else SWEEP_DECAY:g}")
    return (f"sweeps over every state-action pair ({step} in sweep n), up to {learn.max_sweeps:,}, stopped at the "
            "first check of the risk verdict that passes")


def _assumptions(inputs: BriefInputs, eps: float) -> list[tuple[str, str]]:
    settings, manifest, grid = inputs.settings, inputs.manifest, inputs.grid
    dyn, learn, spec = settings.dynamics, settings.learn, settings.grid
    overlap = "any overlap at all" if spec.hazard_overlap == 0 else f"more than {100 * spec.hazard_overlap:g}% of it"
    cover = "wholly" if spec.boundary_cover >= 1 else f"at least {100 * spec.boundary_cover:g}% of it"
    episodes = {name: manifest["results"][name].get("episodes", learn.episodes) for name in POLICIES}
    return [
        ("Grid", f"{grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m; a cell is hazard when a buffered "
                 f"hazard covers {overlap}, inside when the boundary covers it {cover}"),
        ("Moves", f"{dyn.n_actions} headings; move length {dyn.move_length_m(grid.cell_m):g} m between heading "
                  f"decisions; per move: slip {dyn.slip:g} (veers to a neighbouring heading), stall {dyn.stall:g}"),
        ("Drift", f"as drawn x {dyn.drift_scale:g} for planning; risk table also at x "
                  f"{', '.join(f'{m:g}' for m in settings.drift_scales)}"),
        ("Execution noise", f"{eps:g} (share of moves made in a random direction) for training the cautious policy "
                            f"and for the headline figures; risk table at {', '.join(f'{n:g}' for n in settings.noises)}"),
        ("Leaving the boundary", "an incident that ends the run" if dyn.edge == "boundary" else "blocked (wall)"),
        ("Hazard penalty", f"{manifest['model']['boundary_penalty_m']:g} m-equivalent for leaving the boundary and for "
                           "hazards without their own: the detour one would accept to avoid one certain incident"),
        ("Learning", f"{learn.n_seeds} seeds per learner; " + "; ".join(
            f"{METHOD[name]}: " + (_sweeps_text(manifest["results"][name], learn) if manifest["results"][name].get(
                "schedule") == "sweeps" else f"{episodes[name]:,} episodes, step size {learn.step_size:g}"
                + (f" (1/n^{learn.step_decay:g})" if learn.step_decay else "") + f", starts '{learn.start_mode}'")
            for name in POLICIES) + f"; gamma {learn.gamma:g}, Q init '{learn.q_init}'"),
        ("Seed", f"root entropy {manifest['seeds']['entropy']}"),
        ("Monte Carlo", f"{settings.rollouts:,} simulated runs per risk row; Clopper-Pearson 95% intervals shown, "
                        "checks against the exact figures with Clopper-Pearson intervals at the table's level"),
        # a fixed order: the manifest read back from disk has its keys sorted, the one in memory not
        ("Versions", ", ".join(f"{k} {manifest['versions'][k]}" for k in sorted(
            manifest["versions"], key=lambda k: (k != "veerwise", k)) if k != "platform")),
    ]


# ----------------------------------------------------------------------------- HTML and PDF

#: Figures are never shown larger than this many pixels per inch, so the PDF carries
#: them at print resolution (the figures are drawn at ``style.FIGURE_DPI``).
PRINT_PPI = 300
#: The page's text width and the tallest a figure may be drawn (A4 less margins).
TEXT_WIDTH_MM = 184.0
FIGURE_MAX_HEIGHT_MM = 150.0

#: What to install when WeasyPrint cannot find its system libraries.
PDF_LIBRARIES = ("Pango >= 1.44 (Debian/Ubuntu: apt-get install libpango-1.0-0 libpangoft2-1.0-0 "
                 "libharfbuzz-subset0)")

#: Colours of the page furniture; the colours of meaning come from ``planner.style``.
_COLOURS = {"text": style.TEXT, "hazard": style.HAZARD, "disagree": style.DISAGREE, "rule": "#cccccc",
            "muted": "#555555", "header_fill": "#f1efe9", "notice_fill": "#fbeee9", "banner_fill": "#f3ebf8",
            "glance_fill": "#f6f5f1"}


def _figure_path(folder: Path, name: str) -> Path:
    path = Path(folder) / name
    if not path.is_file():
        raise RunFolderError(f"{folder}: figure {name} for the briefing is missing")
    return path


def _keep_numbers_whole(value):
    """Escaped text whose numbers with a minus sign (``1.2e-4``, ``-180.3``) never break."""
    from markupsafe import Markup, escape

    text, out, last = str(value), [], 0
    for m in _NUMBER.finditer(text):
        if "-" in m.group(0):
            out += [escape(text[last:m.start()]), Markup('<span class="nw">%s</span>') % m.group(0)]
            last = m.end()
    out.append(escape(text[last:]))
    return Markup("").join(out)


def _css_string(text: str):
    """``text`` as a CSS string literal, safe inside a ``<style>`` element (a newline starts a line)."""
    from markupsafe import Markup

    safe = "".join(ch if ch.isalnum() and ch.isascii() or ch in " .,-_()" else f"\\{ord(ch):x} " for ch in text)
    return Markup(f'"{safe}"')


@functools.cache
def _templates():
    """The briefing's Jinja2 templates (package data under ``planner/templates``), autoescaping on."""
    from jinja2 import Environment, PackageLoader, StrictUndefined

    env = Environment(loader=PackageLoader("planner", "templates"), autoescape=True, undefined=StrictUndefined,
                      trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True)
    env.filters["numbers"] = _keep_numbers_whole
    env.filters["css_string"] = _css_string
    return env


def _figure_width_mm(path: Path) -> float:
    """Display width of a figure, millimetres.

    The text width, less if that would show it below ``PRINT_PPI`` or taller than
    ``FIGURE_MAX_HEIGHT_MM``.
    """
    from PIL import Image

    with Image.open(path) as image:
        w_px, h_px = image.size
    return min(TEXT_WIDTH_MM, 25.4 * w_px / PRINT_PPI, FIGURE_MAX_HEIGHT_MM * w_px / h_px)


def footer_text(content: dict) -> str:
    """What every printed page carries at its foot: the run, the site file's full hash, the version."""
    return (f"veerwise {content['version']} briefing - run {content['run_id']} - {content['site']} - for "
            f"simulation and review only\nsite file sha256 {content['site_sha256']}")


def render_html(content: dict, inputs: BriefInputs) -> str:
    """The briefing page, with every figure embedded as a data URI (no script, no links).

    Parameters
    ----------
    content : dict
        From :func:`brief_content`.
    inputs : BriefInputs
        The same inputs; only ``folder`` (where the figures are) is read.

    Returns
    -------
    str
        A complete HTML document, styled for A4 printing (``@page`` rules, footers).
    """
    folder = Path(inputs.folder)

    def figure_src(name: str) -> str:
        data = base64.b64encode(_figure_path(folder, name).read_bytes()).decode("ascii")
        return f"data:image/png;base64,{data}"

    sections = []
    for section in content["sections"]:
        blocks = [dict(b, width_mm=_figure_width_mm(_figure_path(folder, b["file"]))) if b["kind"] == "figure"
                  else b for b in section["blocks"]]
        sections.append(dict(section, blocks=blocks))
    return _templates().get_template("base.html.j2").render(
        c=dict(content, sections=sections), colour=_COLOURS, footer=footer_text(content), figure_src=figure_src)


def _weasyprint():
    """The WeasyPrint module, or None when its system libraries (Pango) cannot be loaded."""
    try:
        import weasyprint
    except (ImportError, OSError):
        return None
    return weasyprint


def pdf_unavailable() -> str | None:
    """Why this machine cannot write ``brief.pdf`` (one line naming what to install), or None."""
    if _weasyprint() is not None:
        return None
    from importlib.util import find_spec

    if find_spec("weasyprint") is None:
        return "brief.pdf not written: the Python package weasyprint is not installed (pip install weasyprint)"
    return f"brief.pdf not written: WeasyPrint cannot load its system libraries; install {PDF_LIBRARIES}"


def write_pdf(path, page: str) -> Path:
    """Print the briefing's HTML ``page`` to the PDF ``path`` with WeasyPrint.

    Parameters
    ----------
    path : path-like
        The PDF to write.
    page : str
        From :func:`render_html`; self-contained, so nothing is fetched.

    Returns
    -------
    Path
    """
    weasyprint = _weasyprint()
    if weasyprint is None:
        raise RunFolderError(pdf_unavailable())
    # the page embeds everything it shows: nothing but data URIs is ever fetched
    fetcher = weasyprint.URLFetcher(allowed_protocols={"data"})
    weasyprint.HTML(string=page, url_fetcher=fetcher).write_pdf(Path(path))
    return Path(path)


def write_brief(inputs: BriefInputs, html_path, pdf_path) -> tuple[Path, Path | None]:
    """Write the briefing as HTML and, where WeasyPrint can run, as PDF (each atomically).

    The PDF is printed from the same HTML, so the two cannot say different things.
    Where the PDF cannot be made (see :func:`pdf_unavailable`), a stale ``pdf_path``
    from an earlier rendering is removed rather than left disagreeing with the HTML.

    Returns
    -------
    (Path, Path or None)
        The HTML path, and the PDF path or None when no PDF was written.
    """
    from planner.export import atomic_output

    content = brief_content(inputs)
    page = render_html(content, inputs)
    with atomic_output(html_path) as tmp:
        tmp.write_text(page, encoding="utf-8")
    if pdf_unavailable() is not None:
        Path(pdf_path).unlink(missing_ok=True)
        return Path(html_path), None
    with atomic_output(pdf_path) as tmp:
        write_pdf(tmp, page)
    return Path(html_path), Path(pdf_path)
