"""The briefing a safety reviewer reads and signs before a field trial (HTML and PDF).

This stage owns the briefing's content. It takes finished results (no computation of
its own beyond formatting) and states them once, as plain data
(:func:`brief_content`): the header, the banners a reviewer must not miss, a box of
short answers to the four questions a reviewer asks, then numbered sections made of
blocks. :func:`write_brief` renders that content to HTML and prints the same HTML to
PDF, so the two files cannot say different things.

The stage's other modules, each with one concern: :mod:`planner.brief_headline` (each
route's headline figures in words, shared with ``plan``'s summary),
:mod:`planner.brief_sections` (the numbered sections, one function each),
:mod:`planner.brief_budget` (the risk budget's section) and :mod:`planner.brief_page`
(the kinds of block, the Jinja2 templates under ``planner/templates`` and
WeasyPrint). Page layout (A4, footers, what may not break across a page) is the
templates' CSS, not code.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path

from planner import notation
from planner.brief_headline import (
    METHOD,
    MORE_TRAINING,
    POLICIES,
    REFERENCE_OF,
    compare_routes,
    count_text,
    half_cell_text,
    main_event,
    metres_text,
    route_figures,
    seeds_banner,
    strong_range,
    training_text,
    with_range,
)
from planner.brief_page import bullets, pdf_unavailable, render_html, write_pdf
from planner.brief_sections import (
    CAUTIONS,
    assumptions,
    section_risk,
    section_routes,
    section_signoff,
    section_site,
    section_trust,
    section_waypoints,
)
from planner.budget_plan import ROUTE_NAME as BUDGET_ROUTE
from planner.risk import find_row, format_prob

NOTICE = ("FOR SIMULATION AND REVIEW ONLY - not approved for field operation. The site's safety rules, "
          "certified operators and local regulations take precedence.")


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
        main = main_event(row)
        policies.append({
            **route_figures(name, route, conv, row),
            "method": METHOD[name], "moves": route.n_moves, "waypoints": len(route.waypoints),
            "waypoint_length_m": route.waypoint_length_m, "end_event": route.end_event,
            "min_clearance_m": route.min_clearance_m, "min_clearance_hazard": route.min_clearance_hazard,
            "p_incident_strong": format_prob(row_strong.p_incident) if row_strong else "-",
            "p_incident_strong_range": strong_range(conv, strong, row_strong),
            "p_goal": format_prob(row.p_goal) if row else "-",
            "p_incident_reference": with_range(ref) if ref else "-",
            "delivered": conv.get("delivered", "learned"),
            "half_cell": half_cell_text(row),
            "half_cell_short": half_cell_text(row, short=True),
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
        "assumptions": assumptions(inputs, eps), "warnings": list(manifest.get("warnings", [])),
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
        {"title": "1. The two routes", "blocks": section_routes(content, p)},
        {"title": "2. Risk under worse execution and stronger wind", "blocks": section_risk(content, rows)},
        {"title": "3. Is the answer trustworthy?", "blocks": section_trust(content, rows)},
        {"title": "4. Waypoints and clearances", "blocks": section_waypoints(inputs)},
        {"title": "5. Site and assumptions", "blocks": section_site(inputs, content)},
        {"title": "6. Cautions (from SAFETY.md, in short)", "blocks": [bullets(CAUTIONS, keep=True)]},
        # one piece, never split across pages: what is signed, then the signature
        {"title": "7. Sign-off", "keep": True, "blocks": section_signoff(inputs, content)},
    ]
    if budget is not None:
        from planner.brief_budget import section_budget

        content["sections"].insert(1, {"title": "2. The route within the risk budget, and why each route is risky",
                                       "blocks": section_budget(content, budget, inputs.causes or {}, inputs.routes,
                                                                rows)})
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
        return f"closest approach {metres_text(x['min_clearance_m'])} m to {x['min_clearance_hazard']}"

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
              + f"; {count_text(len(site.drifts), 'drift zone')} as drawn"
              + ("" if math.isclose(base, 1.0) else f" x {base:g}")
              + f"; {count_text(len(site.hazards), 'hazard')}, {ending} of which end the run; leaving the boundary "
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
