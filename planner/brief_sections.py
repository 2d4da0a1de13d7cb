"""The briefing's numbered sections: each a list of blocks, built from the finished results.

Part of the briefing stage (:mod:`planner.brief`, which assembles them under their
titles). One function per section, in the order the briefing prints them: the two
routes side by side, the risk table under worse execution and stronger wind, whether
the answer can be trusted (convergence, Monte Carlo, residuals), the waypoints with
their clearances, the site and every setting, and the sign-off (what is signed, then
the fields to fill in). The risk budget's section is :mod:`planner.brief_budget`'s.
Blocks come from :mod:`planner.brief_page`; no computation beyond formatting.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import TYPE_CHECKING

from planner import brief_page as page
from planner import notation
from planner.brief_headline import METHOD, POLICIES, REFERENCE_OF, main_event, metres_text, route_ends, usable_cells
from planner.budget_plan import ROUTE_NAME as BUDGET_ROUTE
from planner.risk import find_row, format_prob

if TYPE_CHECKING:
    from planner.brief import BriefInputs

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


def section_routes(content: dict, p: dict) -> list:
    """Section 1: the cautious and the shortest route side by side, and the map of both."""
    eps, base, strong = content["noise"], content["drift_scale"], content["strong_drift"]
    c, s = p["cautious"], p["shortest"]

    def both(key, fmt=str):
        return [fmt(c[key]), fmt(s[key])]

    def clearance(x):
        return (f"{metres_text(x['min_clearance_m'])} m ({x['min_clearance_hazard']})" if x["min_clearance_hazard"]
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
        ["mean distance travelled in runs that reach the goal (m)", *both("expected_m", metres_text)],
        ["training", *["converged" if x["converged"] else "NOT CONVERGED" for x in (c, s)]],
    ]
    alerts = [(len(rows) - 1, k + 1) for k, x in enumerate((c, s)) if not x["converged"]]
    alerts += [(1, k + 1) for k, x in enumerate((c, s)) if not x["reached_goal"]]
    alerts += [(half_row, k + 1) for k, x in enumerate((c, s)) if x["half_cell_flagged"]]
    return [
        page.table(["", "cautious route", "shortest route"], rows, alerts=alerts),
        page.para(f"Nominal route: the path each policy intends (its planned move and the most likely outcome of each "
              f"move), from cell centre to cell centre; the waypoints simplify it without coming closer to any "
              f"hazard than the cells do, so their length is a little shorter. Noise {eps:g}: {100 * eps:g}% of moves are made in a random direction, on top of slip. "
              f"Drift x1: drift zones as drawn (the forecast); x2: twice as strong. Closest approach: distance "
              f"from the waypoint legs to a hazard as drawn, buffers not included.", small=True),
        page.figure("routes.png", "map with both routes",
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


def section_risk(content: dict, rows) -> list:
    """Section 2: P(incident) of every policy under worse execution and stronger wind, with its figures."""
    base = content["drift_scale"]
    blocks = [page.para(
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
            main = main_event(r)
            check = "not run" if not r.mc else ("! (section 3)" if r.mc_disagrees else "agrees")
            table.append([r.policy, f"{r.noise:g}", format_prob(r.p_goal), format_prob(r.p_incident), mc,
                          f"{main[0]} ({format_prob(main[1])})" if main else "none", check])
        blocks += [page.subhead(f"Learned routes at drift x{base:g}"),
                   page.table(["policy", "noise", "P(goal)", "P(incident)", "Monte Carlo P(incident) [95% interval]",
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
        blocks += [page.subhead("P(incident) when the wind is stronger than forecast"),
                   page.table(["policy", "noise", *[f"drift x{m:g}" for m in scales]], pivot,
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
    blocks.append(page.para(" ".join(notes), small=True))
    blocks += [
        page.figure("sensitivity.png", "sensitivity chart",
                "P(incident) against execution noise on a log scale, the learned policies and the exact references "
                "in panels of their own; thicker lines for the strongest drift tabulated; values under 1 in 10^12 "
                "drawn with open markers on a floor line of their own."),
        page.figure("riskmap.png", "risk maps",
                f"If the vehicle were here: P(incident before the goal) of a run from each cell, at noise "
                f"{content['noise']:g} and drift x{base:g}, on a log colour scale, with each policy's nominal route. "
                "Hazards that end the run are hatched white, apart from the scale."),
    ]
    return blocks


def section_trust(content: dict, rows) -> list:
    """Section 3: whether the answer can be trusted (convergence, Monte Carlo, residuals, learning curves)."""
    table, alerts = [], []
    for k, x in enumerate(content["policies"]):
        if not x["converged"]:
            alerts.append((k, 1))
        table.append([x["name"], "converged" if x["converged"] else "NOT CONVERGED", f"{100 * x['agreement']:.1f}%",
                      metres_text(x["value_gap_m"]), f"{x['seed_routes_matching']} of {x['n_seeds']}",
                      f"{x['p_incident']} / {x['p_incident_reference']}", x["training"]])
    blocks = [
        page.table(["policy", "training", "agreement with exact", "value gap at start (m-equiv.)",
                "seed routes within 2 cells", f"P(incident) learned / exact, noise {content['noise']:g}",
                "training (seeds x budget, updates)"], table, numeric=(2, 3), alerts=alerts),
        page.bullets([f"{x['name']} (delivered: {x['delivered']}): {x['message']}" for x in content["policies"]]),
        page.para("Verdict: a learned policy is converged only when its own exact P(incident) lies within its exact "
              "reference's range over equally good tie-breaks, widened by 10 % or the Monte Carlo 99 % interval "
              "(whichever is wider), and its expected length is within 1 % of the reference's. Ties are broken "
              "by safety: among actions within the tie tolerance of the best, the one with the least P(incident) "
              "at the run's noise.", small=True),
        page.para("Agreement: share of the states the policy visits (weighted by how often) where its action is optimal "
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
    blocks.append(page.para(" ".join(text)))
    blocks.append(page.figure("learning.png", "learning curves",
                          "Learners trained in episodes: return per episode (moving average; line = mean over "
                          "seeds, band = range) and the share of training episodes that ended in an incident. "
                          "Learners trained in sweeps: each seed's greedy value at the start (line = mean, band = "
                          "range over seeds) and the exact P(incident) of the delivered policy at each check of "
                          "the risk verdict, against the updates made. Values are minus costs in "
                          "metres-equivalent."))
    return blocks


def section_waypoints(inputs: BriefInputs) -> list:
    """Section 4: each delivered route's waypoints with their legs and clearances."""
    blocks = [page.para("Waypoints as written to routes-*.geojson and waypoints-*.csv (simulation only). Clearance: "
                    "distance from the waypoint to the nearest hazard as drawn, buffers not included. Latitude and "
                    "longitude in degrees (WGS 84).", small=True)]
    for name in (*POLICIES, *([BUDGET_ROUTE] if BUDGET_ROUTE in inputs.routes and inputs.budget is not None else [])):
        route = inputs.routes[name]
        wrows = [[w.seq, f"{w.east_m:.1f}", f"{w.north_m:.1f}", f"{w.lat:.7f}", f"{w.lon:.7f}", f"{w.leg_m:.1f}",
                  f"{w.cumulative_m:.1f}", metres_text(w.clearance_m), w.nearest_hazard or "-"] for w in route.waypoints]
        blocks.append(page.subhead(f"{'within-budget' if name == 'budget' else name} route: {len(route.waypoints)} waypoints, {route.waypoint_length_m:.1f} m "
                               f"(cell path {route.length_m:.1f} m), ends {route_ends(route)}; closest approach "
                               f"{metres_text(route.min_clearance_m)} m"
                               + (f" to {route.min_clearance_hazard}" if route.min_clearance_hazard else "")))
        blocks.append(page.table(["#", "east (m)", "north (m)", "lat (deg)", "lon (deg)", "leg (m)", "total (m)",
                              "clearance (m)", "nearest hazard"], wrows, numeric=range(8), small=True))
    return blocks


def _compass(deg: float) -> str:
    return ("N", "NE", "E", "SE", "S", "SW", "W", "NW")[int((deg % 360.0) / 45.0 + 0.5) % 8]


def section_site(inputs: BriefInputs, content: dict) -> list:
    """Section 5: the site, its zones as modelled, every setting and the warnings raised."""
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
    blocks = [page.table(["", ""], summary)]
    if zones:
        blocks += [page.subhead("Zones as modelled"), page.table(["zone", "kind", "as modelled"], zones)]
    blocks += [page.subhead("Model, learning and risk settings"), page.table(["setting", "value"], content["assumptions"])]
    if content["warnings"]:
        blocks += [page.subhead("Warnings raised while planning"), page.bullets(content["warnings"])]
    return blocks


def _sweeps_text(result: dict, learn) -> str:
    """The sweeps schedule of one learner, for the assumptions table."""
    from planner.learn import SWEEP_DECAY

    horizon = result.get("sweep_horizon")
    step = (f"step {horizon:g} / ({horizon:g} + n - 1)" if horizon else
            f"step n^-{learn.step_decay if learn.step_decay else SWEEP_DECAY:g}")
    return (f"sweeps over every state-action pair ({step} in sweep n), up to {learn.max_sweeps:,}, stopped at the "
            "first check of the risk verdict that passes")


def assumptions(inputs: BriefInputs, eps: float) -> list[tuple[str, str]]:
    """The model, learning and risk settings as (setting, value) rows of section 5."""
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


def section_signoff(inputs: BriefInputs, content: dict) -> list:
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
                       f"{route_ends(inputs.routes['budget'])}", x["p_incident"], x["delivered"],
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
        "routes": page.table(["delivered route", "as flown by its waypoints", f"P(incident), noise {eps:g}",
                          "policy delivered", "waypoint file"], routes, alerts=alerts, small=True),
    }
    blocks = []
    if not content["converged"]:
        blocks.append(page.para("NOT CONVERGED: the learned " + " and ".join(
            x["name"] for x in content["policies"] if not x["converged"]) + " route must not be signed; this "
            "briefing is not ready for review.", alert=True))
    blocks += [
        page.para("To be completed by the person responsible for the trial. This tool approves nothing for field "
              "operation: a decision below is the reviewer's, under the site's safety rules, with its certified "
              "operators and within local regulations.", small=True),
        signed,
        {"kind": "signoff",
         "choices": [("Route (tick one)", [r[0] + f" ({r[1].split(',')[0]})" for r in routes]),
                     ("Decision (tick one)", list(DECISIONS))],
         "fields": fields},
    ]
    return blocks
