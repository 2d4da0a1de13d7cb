"""The briefing: one self-contained HTML page (and a PDF of the same content) that a
safety reviewer reads and signs before a field trial.

This stage owns the briefing's content and layout. It takes finished results (no
computation of its own beyond formatting), embeds every figure as a data URI so the
page needs no network and no other file, and prints well on A4.

The content is built once (:func:`brief_content`) as plain data: a box of short
answers, then numbered sections made of blocks (paragraphs, tables, figures, lists,
the sign-off). :func:`render_html` and :func:`write_pdf` both walk those same blocks,
so the two files cannot say different things. The PDF is drawn with matplotlib, so
no browser is needed at run time.
"""

from __future__ import annotations

import base64
import html
import math
import re
from dataclasses import dataclass
from pathlib import Path

from planner import notation, style
from planner.errors import RunFolderError
from planner.risk import find_row, format_prob

#: The two policies, in the order the briefing shows them.
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

#: The sign-off block: each field's label and the height (mm) left blank for it.
SIGNOFF_FIELDS = (
    ("Reviewed by (name, role)", 11),
    ("Date", 11),
    ("Decision (approve for simulation / approve for field trial under site rules / refuse)", 13),
    ("Conditions and remarks", 24),
    ("Signature", 13),
)

NOTICE = ("FOR SIMULATION AND REVIEW ONLY - not approved for field operation. The site's safety rules, "
          "certified operators and local regulations take precedence.")

_HEADER_FILL = "#f1efe9"
_RULE = "#cccccc"
_MUTED = "#555555"
_NOTICE_FILL = "#fbeee9"
_BANNER_FILL = "#f3ebf8"
_GLANCE_FILL = "#f6f5f1"

_CSS = f"""
@page {{ size: A4; margin: 13mm 13mm 16mm 13mm;
  @bottom-left {{ content: FOOTER; font: 7.5pt "DejaVu Sans", Arial, sans-serif; color: #666; }}
  @bottom-right {{ content: "page " counter(page) " of " counter(pages);
                   font: 7.5pt "DejaVu Sans", Arial, sans-serif; color: #666; }} }}
* {{ -webkit-print-color-adjust: exact; print-color-adjust: exact; box-sizing: border-box; }}
body {{ font-family: "DejaVu Sans", Arial, sans-serif; font-size: 9.5pt; color: {style.TEXT}; max-width: 184mm;
       margin: 0 auto; line-height: 1.35; }}
h1 {{ font-size: 16pt; margin: 0 0 1.5mm 0; }}
h2 {{ font-size: 12pt; margin: 5mm 0 2mm 0; border-bottom: 1px solid #bbb; padding-bottom: 1mm;
     break-after: avoid; page-break-after: avoid; }}
h3 {{ font-size: 10pt; margin: 3.5mm 0 1.5mm 0; break-after: avoid; page-break-after: avoid; }}
p {{ margin: 1.5mm 0; orphans: 3; widows: 3; }}
h2 + p, h3 + p {{ break-after: avoid; page-break-after: avoid; }}
.notice {{ border: 2px solid {style.HAZARD}; background: {_NOTICE_FILL}; padding: 2mm 3mm; font-weight: bold;
          margin: 2.5mm 0; break-inside: avoid; }}
.banner {{ border: 2px solid {style.DISAGREE}; background: {_BANNER_FILL}; padding: 2mm 3mm; font-weight: bold;
          margin: 2.5mm 0; break-inside: avoid; }}
.glance {{ border: 1px solid #bbb; background: {_GLANCE_FILL}; padding: 1mm 3mm 2mm 3mm; margin: 3mm 0;
          break-inside: avoid; }}
.glance h2 {{ border: none; margin: 1.5mm 0 1mm 0; }}
.glance dt {{ font-weight: bold; margin-top: 1.8mm; }}
.glance dd {{ margin: 0.3mm 0 0 0; }}
.alert {{ color: {style.HAZARD}; font-weight: bold; }}
table {{ border-collapse: collapse; width: 100%; margin: 1.5mm 0 2.5mm 0; font-size: 8.5pt; }}
table.keep {{ break-inside: avoid; page-break-inside: avoid; }}
table.small {{ font-size: 7.8pt; }}
thead {{ display: table-header-group; }}
tr {{ break-inside: avoid; page-break-inside: avoid; }}
th, td {{ border: 1px solid {_RULE}; padding: 0.7mm 1.4mm; text-align: left; vertical-align: top; }}
th {{ background: {_HEADER_FILL}; }}
td.num, th.num {{ text-align: right; font-variant-numeric: tabular-nums; }}
figure {{ margin: 2mm 0 3mm 0; break-inside: avoid; page-break-inside: avoid; }}
figure img {{ max-width: 100%; max-height: 150mm; display: block; margin: 0 auto; }}
figcaption {{ font-size: 8pt; color: {_MUTED}; margin-top: 1mm; }}
ul {{ margin: 1mm 0; padding-left: 5mm; }}
li {{ margin: 0.6mm 0; }}
.small {{ font-size: 8pt; color: {_MUTED}; }}
.nw {{ white-space: nowrap; }}
table.narrow {{ width: auto; min-width: 55%; }}
ul.keep, section.keep, div.keep {{ break-inside: avoid; page-break-inside: avoid; }}
.signoff {{ break-inside: avoid; page-break-inside: avoid; }}
.signoff th {{ width: 40%; }}
"""


def _esc(value) -> str:
    return html.escape(str(value))


#: Numbers a browser must not break at their minus sign (``1.2e-4``, ``1-3.0e-6``, ``-180.3``).
_NUMBER = re.compile(r"-?\d[\d.,]*(?:e-\d+)?(?:-\d[\d.]*e-\d+)?")


def _text(value) -> str:
    """Escaped text whose numbers are kept whole on one line."""
    out, last = [], 0
    text = str(value)
    for m in _NUMBER.finditer(text):
        if "-" in m.group(0):
            out += [html.escape(text[last:m.start()]), f"<span class='nw'>{html.escape(m.group(0))}</span>"]
            last = m.end()
    out.append(html.escape(text[last:]))
    return "".join(out)


def _css_string(text: str) -> str:
    """``text`` as a CSS string literal, safe inside a ``<style>`` element."""
    safe = "".join(ch if ch.isalnum() or ch in " .,-_()" else f"\\{ord(ch):x} " for ch in text)
    return f'"{safe}"'


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
        ``kind`` of ``para``, ``subhead``, ``table``, ``figure``, ``list`` or ``signoff``).
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
            "expected_m": row.expected_m if row else math.nan,
            "main_event": f"{main[0]} ({format_prob(main[1])})" if main else "none",
            "agreement": conv["agreement"],
            "value_gap_m": math.inf if conv["value_gap_m"] is None else conv["value_gap_m"],
            "episodes": conv.get("episodes", learn.episodes),
        })
    p = {x["name"]: x for x in policies}
    content = {
        "site": site.name, "created": manifest["created_utc"], "run_name": inputs.run_name or inputs.folder.name,
        "noise": eps, "drift_scale": base, "strong_drift": strong, "policies": policies,
        "converged": all(x["converged"] for x in policies),
        "assumptions": _assumptions(inputs, eps), "warnings": list(manifest.get("warnings", [])),
        "notice": NOTICE,
    }
    content["banners"] = _banners(policies)
    content["glance"] = _glance(inputs, content, p, rows)
    content["sections"] = [
        {"title": "1. The two routes", "blocks": _section_routes(content, p)},
        {"title": "2. Risk under worse execution and stronger wind", "blocks": _section_risk(content, rows)},
        {"title": "3. Is the answer trustworthy?", "blocks": _section_trust(content, rows)},
        {"title": "4. Waypoints and clearances", "blocks": _section_waypoints(inputs)},
        {"title": "5. Site and assumptions", "blocks": _section_site(inputs, content)},
        {"title": "6. Cautions (from SAFETY.md, in short)", "blocks": [_list(CAUTIONS, keep=True)]},
        {"title": "7. Sign-off", "blocks": [
            *([_para("NOT CONVERGED: the learned " + " and ".join(
                x["name"] for x in policies if not x["converged"]) + " route must not be signed; this briefing "
                "is not ready for review.", alert=True)] if not content["converged"] else []),
            _para("To be completed by the person responsible for the trial. A briefing with a training-not-"
                  "converged banner is not ready for review.", small=True),
            {"kind": "signoff", "fields": list(SIGNOFF_FIELDS)}]},
    ]
    return content


def _with_range(ref) -> str:
    """A reference's P(incident) with the range over its equally good tie-breaks."""
    text = format_prob(ref.p_incident)
    rng = ref.p_incident_range
    if rng is not None and rng[1] > rng[0]:
        text += f" (equally good routes: {notation.probability_range(*rng)})"
    return text


def usable_cells(grid) -> str:
    """The count of usable cells as ``veerwise check`` prints it: every cell the vehicle can
    be in, goal cells included."""
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
    """How the cautious route compares with the shortest, in one or two sentences, and
    whether a reviewer must be alerted (the cautious one is not the less risky).

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


def seeds_banner(x: dict) -> str:
    """The banner raised when the training seeds do not agree on a policy's route."""
    return (f"SEEDS DISAGREE on the {x['name']} route: only {x['seed_routes_matching']} of {x['n_seeds']} "
            "training runs keep within 2 cells of it, so it depends on the seed, not only on the yard "
            f"(P(incident) over the runs {x['p_incident_range']}). Re-run with more episodes before signing.")


def _banners(policies) -> list[str]:
    out = []
    bad = [x for x in policies if not x["converged"]]
    for x in bad:
        out.append(f"NOT CONVERGED: the learned {x['name']} policy's risk does not agree with its exact reference "
                   f"({x['message']}). The learned {x['name']} route must not be signed; re-run with more "
                   "episodes.")
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
              f"A grid of {grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m; {dyn.n_actions} move "
              f"directions; a move veers to a neighbouring direction with probability {dyn.slip:g}"
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
            "its exact reference" for x in bad) + ": do not sign the learned route; re-run with more episodes.")
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
    trust += " The figures are exact for the model only (section 6)."
    return [("Which route?", which, which_alert), ("How risky?", risky, False),
            ("Under what assumptions?", assume, False),
            ("Is the answer trustworthy?", trust, bool(bad) or bool(split) or never > 0)]


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
    ]
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
    return [
        _table(["", "cautious route", "shortest route"], rows, alerts=alerts),
        _para(f"Nominal route: the path each policy intends (its planned move and the most likely outcome of each "
              f"move), from cell centre to cell centre; the waypoints simplify it without coming closer to any "
              f"hazard than the cells do, so their length is a little shorter. Noise {eps:g}: {100 * eps:g}% of moves are made in a random direction, on top of slip. "
              f"Drift x1: drift zones as drawn (the forecast); x2: twice as strong. Closest approach: distance "
              f"from the waypoint legs to a hazard as drawn, buffers not included.", small=True),
        _figure("routes.png", "map with both routes",
                "Site, zones, drift arrows (direction of the mean push, drawn above the routes) and both nominal "
                "routes with their waypoints; hazards that end the run are hatched. Distances in metres."),
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
        "come from the absorbing Markov chain of each policy; Monte Carlo estimates (simulated runs, Wilson 95% "
        "interval) check the computation.", small=True)]

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
                     "outside its Monte Carlo interval, checked at a 95% level for the whole table; section 3 "
                     "names it.")
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
                      f"{x['p_incident']} / {x['p_incident_reference']}", f"{x['n_seeds']} x {x['episodes']:,}"])
    blocks = [
        _table(["policy", "training", "agreement with exact", "value gap at start (m-equiv.)",
                "seed routes within 2 cells", f"P(incident) learned / exact, noise {content['noise']:g}",
                "seeds x episodes"], table, numeric=(2, 3), alerts=alerts),
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
                    + ("every exact figure lies inside its interval." if not flagged else
                       f"{len(flagged)} row(s) have an exact figure outside its interval: "
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
                          "Return per episode (moving average; line = mean over seeds, band = range) and the share "
                          "of training episodes that ended in an incident. Returns are minus costs in "
                          "metres-equivalent."))
    return blocks


def _section_waypoints(inputs: BriefInputs) -> list:
    blocks = [_para("Waypoints as written to routes-*.geojson and waypoints-*.csv (simulation only). Clearance: "
                    "distance from the waypoint to the nearest hazard as drawn, buffers not included. Latitude and "
                    "longitude in degrees (WGS 84).", small=True)]
    for name in POLICIES:
        route = inputs.routes[name]
        wrows = [[w.seq, f"{w.east_m:.1f}", f"{w.north_m:.1f}", f"{w.lat:.7f}", f"{w.lon:.7f}", f"{w.leg_m:.1f}",
                  f"{w.cumulative_m:.1f}", _metres(w.clearance_m), w.nearest_hazard or "-"] for w in route.waypoints]
        blocks.append(_subhead(f"{name} route: {len(route.waypoints)} waypoints, {route.waypoint_length_m:.1f} m "
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
            what = (f"pushes toward {zone.toward_deg:.0f} deg ({_compass(zone.toward_deg)}) by {zone.push_m:g} m per "
                    f"move, spread {zone.spread_m:g} m, on {100 * zone.chance:g}% of moves")
        zones.append([zone.name, zone.role, what])
    blocks = [_table(["", ""], summary)]
    if zones:
        blocks += [_subhead("Zones as modelled"), _table(["zone", "kind", "as modelled"], zones)]
    blocks += [_subhead("Model, learning and risk settings"), _table(["setting", "value"], content["assumptions"])]
    if content["warnings"]:
        blocks += [_subhead("Warnings raised while planning"), _list(content["warnings"])]
    return blocks


def _assumptions(inputs: BriefInputs, eps: float) -> list[tuple[str, str]]:
    settings, manifest, grid = inputs.settings, inputs.manifest, inputs.grid
    dyn, learn, spec = settings.dynamics, settings.learn, settings.grid
    overlap = "any overlap at all" if spec.hazard_overlap == 0 else f"more than {100 * spec.hazard_overlap:g}% of it"
    cover = "wholly" if spec.boundary_cover >= 1 else f"at least {100 * spec.boundary_cover:g}% of it"
    episodes = {name: manifest["results"][name].get("episodes", learn.episodes) for name in POLICIES}
    ep_text = (f"{episodes['cautious']:,}" if episodes["cautious"] == episodes["shortest"]
               else f"{episodes['cautious']:,} (SARSA) / {episodes['shortest']:,} (Q-learning)")
    return [
        ("Grid", f"{grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m; a cell is hazard when a buffered "
                 f"hazard covers {overlap}, inside when the boundary covers it {cover}"),
        ("Moves", f"{dyn.n_actions} directions; slip {dyn.slip:g} (the move veers to a neighbouring direction), "
                  f"stall {dyn.stall:g}"),
        ("Drift", f"as drawn x {dyn.drift_scale:g} for planning; risk table also at x "
                  f"{', '.join(f'{m:g}' for m in settings.drift_scales)}"),
        ("Execution noise", f"{eps:g} (share of moves made in a random direction) for training the cautious policy "
                            f"and for the headline figures; risk table at {', '.join(f'{n:g}' for n in settings.noises)}"),
        ("Leaving the boundary", "an incident that ends the run" if dyn.edge == "boundary" else "blocked (wall)"),
        ("Hazard penalty", f"{manifest['model']['boundary_penalty_m']:g} m-equivalent for leaving the boundary and for "
                           "hazards without their own: the detour one would accept to avoid one certain incident"),
        ("Learning", f"{learn.n_seeds} seeds x {ep_text} episodes per learner, step size {learn.step_size:g}"
                     + (f" (1/n^{learn.step_decay:g})" if learn.step_decay else "")
                     + f", gamma {learn.gamma:g}, starts '{learn.start_mode}', Q init '{learn.q_init}'"),
        ("Seed", f"root entropy {manifest['seeds']['entropy']}"),
        ("Monte Carlo", f"{settings.rollouts:,} simulated runs per risk row, Wilson 95% intervals"),
        # a fixed order: the manifest read back from disk has its keys sorted, the one in memory not
        ("Versions", ", ".join(f"{k} {manifest['versions'][k]}" for k in sorted(
            manifest["versions"], key=lambda k: (k != "veerwise", k)) if k != "platform")),
    ]


# ----------------------------------------------------------------------------- HTML


def _figure_path(folder: Path, name: str) -> Path:
    path = Path(folder) / name
    if not path.is_file():
        raise RunFolderError(f"{folder}: figure {name} for the briefing is missing")
    return path


def _html_table(block: dict) -> str:
    numeric, alerts = block["numeric"], block["alerts"]

    def cell(tag, i, v, r=None):
        cls = []
        if i in numeric:
            cls.append("num")
        if r is not None and (r, i) in alerts:
            cls.append("alert")
        attr = f' class="{" ".join(cls)}"' if cls else ""
        return f"<{tag}{attr}>{_text(v)}</{tag}>"

    classes = " ".join(c for c in ("keep", "small", "narrow") if block.get(c))
    head = ""
    if any(block["headers"]):
        head = "<thead><tr>" + "".join(cell("th", i, h) for i, h in enumerate(block["headers"])) + "</tr></thead>"
    body = "".join("<tr>" + "".join(cell("th" if i == 0 and not any(block["headers"]) else "td", i, v, r)
                                    for i, v in enumerate(row)) + "</tr>"
                   for r, row in enumerate(block["rows"]))
    cls = f' class="{classes}"' if classes else ""
    return f"<table{cls}>{head}<tbody>{body}</tbody></table>"


def _unbreakable(block: dict) -> bool:
    return block["kind"] in ("figure", "signoff") or bool(block.get("keep"))


def _html_blocks(blocks: list, folder: Path) -> list[str]:
    """Blocks as HTML; a heading is grouped with what follows it up to the first block that
    must not be split, since browsers do not keep a heading with such a block on their own."""
    out, k = [], 0
    while k < len(blocks):
        if blocks[k]["kind"] in ("title", "subhead"):
            end = k + 1
            while end < len(blocks) and blocks[end]["kind"] in ("para", "subhead"):
                end += 1
            if end < len(blocks) and _unbreakable(blocks[end]):
                out.append("<div class='keep'>" + "".join(_html_block(b, folder) for b in blocks[k:end + 1])
                           + "</div>")
                k = end + 1
                continue
        out.append(_html_block(blocks[k], folder))
        k += 1
    return out


def _html_block(block: dict, folder: Path) -> str:
    kind = block["kind"]
    if kind == "title":
        return f"<h2>{_esc(block['text'])}</h2>"
    if kind == "para":
        cls = " ".join(c for c in ("small", "alert") if block.get(c))
        return f"<p class='{cls}'>{_text(block['text'])}</p>" if cls else f"<p>{_text(block['text'])}</p>"
    if kind == "subhead":
        return f"<h3>{_text(block['text'])}</h3>"
    if kind == "table":
        return _html_table(block)
    if kind == "list":
        cls = " class='keep'" if block.get("keep") else ""
        return f"<ul{cls}>" + "".join(f"<li>{_text(i)}</li>" for i in block["items"]) + "</ul>"
    if kind == "figure":
        data = base64.b64encode(_figure_path(folder, block["file"]).read_bytes()).decode("ascii")
        return (f'<figure><img alt="{_esc(block["alt"])}" src="data:image/png;base64,{data}">'
                f"<figcaption>{_esc(block['caption'])}</figcaption></figure>")
    if kind == "signoff":
        rows = "".join(f"<tr><th>{_esc(label)}</th><td style='height:{mm}mm'></td></tr>"
                       for label, mm in block["fields"])
        return f"<table class='signoff'><tbody>{rows}</tbody></table>"
    raise ValueError(f"unknown briefing block kind {kind!r}")


def render_html(content: dict, inputs: BriefInputs) -> str:
    """The briefing page, with every figure embedded as a data URI (no script, no links).

    Parameters
    ----------
    content : from :func:`brief_content`.
    inputs : the same inputs; only ``folder`` (where the figures are) is read.

    Returns
    -------
    str
        A complete HTML document, styled for A4 printing.
    """
    footer = _css_string(f"veerwise briefing - {content['site']} - for simulation and review only")
    css = _CSS.replace("FOOTER", footer)
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
             f"<title>veerwise briefing - {_esc(content['site'])}</title><style>{css}</style></head><body>",
             f"<h1>Pre-trial briefing: {_esc(content['site'])}</h1>",
             f"<p class='small'>Generated by veerwise on {_esc(content['created'])}. "
             f"Run folder: {_esc(content['run_name'])}.</p>",
             f"<div class='notice'>{_esc(content['notice'])}</div>"]
    parts += [f"<div class='banner'>{_text(b)}</div>" for b in content["banners"]]
    parts.append("<div class='glance'><h2>At a glance</h2><dl>" + "".join(
        f"<dt>{_esc(q)}</dt><dd{' class=alert' if alert else ''}>{_text(a)}</dd>"
        for q, a, alert in content["glance"]) + "</dl></div>")
    for section in content["sections"]:
        # the sign-off is signed as one piece: never split it from its heading
        keep = any(b["kind"] == "signoff" for b in section["blocks"])
        parts.append(f"<section{' class=keep' if keep else ''}>")
        parts += _html_blocks([{"kind": "title", "text": section["title"]}, *section["blocks"]], inputs.folder)
        parts.append("</section>")
    parts.append("</body></html>")
    return "\n".join(parts)


def write_brief(inputs: BriefInputs, html_path, pdf_path) -> tuple[Path, Path]:
    """Write the briefing as HTML and as PDF (each atomically).

    Returns
    -------
    (Path, Path)
        The HTML and PDF paths.
    """
    from planner.export import atomic_output

    content = brief_content(inputs)
    page = render_html(content, inputs)
    with atomic_output(html_path) as tmp:
        tmp.write_text(page, encoding="utf-8")
    with atomic_output(pdf_path) as tmp:
        write_pdf(tmp, inputs.folder, content)
    return Path(html_path), Path(pdf_path)


# ----------------------------------------------------------------------------- PDF

#: A4 in points (1/72 inch), and the page margins of the PDF.
_A4_PT = (595.28, 841.89)
_MARGIN_PT = {"left": 37.0, "right": 37.0, "top": 38.0, "bottom": 46.0}
_MM = 72.0 / 25.4


class _Flow:
    """Blocks laid out top to bottom on A4 matplotlib figures, a new page when one is full.

    Positions are in points from the page's top-left corner. Text is wrapped with
    per-character advance widths of DejaVu Sans (measured once per character), which
    is what the PDF embeds.
    """

    def __init__(self, folder: Path):
        import matplotlib.pyplot as plt
        from matplotlib.font_manager import FontProperties
        from matplotlib.textpath import TextToPath

        self.plt = plt
        self.folder = Path(folder)
        self.pages = []
        self.width = _A4_PT[0] - _MARGIN_PT["left"] - _MARGIN_PT["right"]
        self._measure = TextToPath()
        self._props = {w: FontProperties(family="DejaVu Sans", weight=w, size=10.0) for w in ("normal", "bold")}
        self._advance = {}
        self.new_page()

    # -- geometry
    def new_page(self) -> None:
        self.fig = self.plt.figure(figsize=(_A4_PT[0] / 72.0, _A4_PT[1] / 72.0))
        self.pages.append(self.fig)
        self.y = _MARGIN_PT["top"]

    @property
    def room(self) -> float:
        return _A4_PT[1] - _MARGIN_PT["bottom"] - self.y

    @property
    def full_height(self) -> float:
        return _A4_PT[1] - _MARGIN_PT["bottom"] - _MARGIN_PT["top"]

    def need(self, height: float) -> None:
        """Start a new page unless ``height`` points fit (a fresh page always takes what it can)."""
        if height > self.room and self.y > _MARGIN_PT["top"] + 0.5:
            self.new_page()

    def _fx(self, x: float) -> float:
        return x / _A4_PT[0]

    def _fy(self, y: float) -> float:
        return 1.0 - y / _A4_PT[1]

    # -- text
    def text_width(self, text: str, size: float, bold: bool = False) -> float:
        weight = "bold" if bold else "normal"
        total = 0.0
        for ch in text:
            key = (ch, weight)
            if key not in self._advance:
                w, _, _ = self._measure.get_text_width_height_descent(ch if ch != " " else "a a", self._props[weight],
                                                                      ismath=False)
                if ch == " ":
                    w -= 2 * self._measure.get_text_width_height_descent("a", self._props[weight], ismath=False)[0]
                self._advance[key] = w / 10.0
            total += self._advance[key]
        # kerning and rounding make real lines a little narrower or wider; keep slack
        return total * 1.02 * size

    def wrap(self, text: str, size: float, width: float, bold: bool = False) -> list[str]:
        lines = []
        for paragraph in str(text).split("\n"):
            current = ""
            for word in paragraph.split(" "):
                candidate = word if not current else f"{current} {word}"
                if self.text_width(candidate, size, bold) <= width:
                    current = candidate
                    continue
                if current:
                    lines.append(current)
                current = word
                while self.text_width(current, size, bold) > width and len(current) > 1:
                    cut = len(current) - 1
                    while cut > 1 and self.text_width(current[:cut], size, bold) > width:
                        cut -= 1
                    lines.append(current[:cut])
                    current = current[cut:]
            lines.append(current)
        return lines

    def put(self, x: float, y: float, text: str, size: float, *, bold: bool = False, color: str = style.TEXT,
            ha: str = "left") -> None:
        self.fig.text(self._fx(x), self._fy(y), text, fontsize=size, fontweight="bold" if bold else "normal",
                      color=color, ha=ha, va="top", family="DejaVu Sans")

    def rect(self, x: float, y: float, w: float, h: float, *, fill: str | None = None, edge: str | None = _RULE,
             lw: float = 0.5) -> None:
        from matplotlib.patches import Rectangle

        self.fig.add_artist(Rectangle((self._fx(x), self._fy(y + h)), w / _A4_PT[0], h / _A4_PT[1],
                                      transform=self.fig.transFigure, facecolor=fill or "none",
                                      edgecolor=edge or "none", linewidth=lw if edge else 0))

    def hline(self, y: float, *, color: str = "#bbbbbb", lw: float = 0.6) -> None:
        from matplotlib.lines import Line2D

        left = _MARGIN_PT["left"]
        self.fig.add_artist(Line2D([self._fx(left), self._fx(left + self.width)], [self._fy(y)] * 2,
                                   transform=self.fig.transFigure, color=color, lw=lw))

    # -- blocks
    def paragraph(self, text: str, size: float = 9.0, *, bold: bool = False, color: str = style.TEXT,
                  indent: float = 0.0, after: float = 4.0) -> None:
        line_h = size * 1.32
        lines = self.wrap(text, size, self.width - indent, bold)
        if len(lines) * line_h <= self.full_height / 3:
            self.need(len(lines) * line_h)
        for line in lines:
            self.need(line_h)
            self.put(_MARGIN_PT["left"] + indent, self.y, line, size, bold=bold, color=color)
            self.y += line_h
        self.y += after

    def heading(self, text: str, size: float = 12.0, *, keep: float = 90.0) -> None:
        lines = self.wrap(text, size, self.width, bold=True)
        self.need(len(lines) * size * 1.35 + 8.0 + keep)
        self.y += 4.0
        for line in lines:
            self.put(_MARGIN_PT["left"], self.y, line, size, bold=True)
            self.y += size * 1.35
        if size >= 11:
            self.hline(self.y)
            self.y += 4.0

    def box(self, items: list[tuple[str | None, str, bool]], *, edge: str, fill: str, size: float = 9.0,
            lw: float = 1.5, title: str | None = None) -> None:
        """A framed box of optional bold labels and wrapped texts."""
        pad = 6.0
        inner = self.width - 2 * pad
        line_h = size * 1.32
        laid = []
        height = 2 * pad
        if title:
            height += 12 * 1.6
        for label, text, alert in items:
            label_lines = self.wrap(label, size, inner, bold=True) if label else []
            text_lines = self.wrap(text, size, inner, bold=alert or not label)
            laid.append((label_lines, text_lines, alert or not label))
            height += (len(label_lines) + len(text_lines)) * line_h + (4.0 if label else 0.0)
        self.need(height)
        left = _MARGIN_PT["left"]
        self.rect(left, self.y, self.width, height, fill=fill, edge=edge, lw=lw)
        y = self.y + pad
        if title:
            self.put(left + pad, y, title, 12, bold=True)
            y += 12 * 1.6
        for label_lines, text_lines, strong in laid:
            for line in label_lines:
                self.put(left + pad, y, line, size, bold=True)
                y += line_h
            color = style.HAZARD if strong and label_lines else style.TEXT
            for line in text_lines:
                self.put(left + pad, y, line, size, bold=strong, color=color)
                y += line_h
            if label_lines:
                y += 4.0
        self.y += height + 6.0

    _TABLE_PAD = (3.0, 2.2)

    def table_layout(self, block: dict):
        """Column widths, and the wrapped header and rows of a table with their heights."""
        size = 7.0 if block["small"] else 7.6
        pad_x, pad_y = self._TABLE_PAD
        line_h = size * 1.3
        headers, rows = block["headers"], block["rows"]
        has_head = any(headers)
        n_cols = len(headers)
        cells = ([headers] if has_head else []) + rows
        natural = [max(self.text_width(r[i], size, bold=True) for r in cells) + 2 * pad_x for i in range(n_cols)]
        minimal = [max(max((self.text_width(w, size, bold=True) for w in r[i].split(" ")), default=0.0)
                       for r in cells) + 2 * pad_x for i in range(n_cols)]
        total = self.width
        if block.get("narrow"):
            total = min(self.width, max(0.55 * self.width, sum(natural)))
        widths = _column_widths(natural, minimal, total)

        def laid(row, bold):
            wrapped = [self.wrap(v, size, widths[i] - 2 * pad_x, bold) for i, v in enumerate(row)]
            return wrapped, max(len(w) for w in wrapped) * line_h + 2 * pad_y

        head = laid(headers, True) if has_head else None
        body = [laid(r, False) for r in rows]
        return size, widths, head, body

    def table(self, block: dict) -> None:
        size, widths, head, body = self.table_layout(block)
        pad_x, pad_y = self._TABLE_PAD
        line_h = size * 1.3
        has_head = head is not None
        lefts = [_MARGIN_PT["left"] + sum(widths[:i]) for i in range(len(widths))]
        if block["keep"]:
            self.need((head[1] if head else 0.0) + sum(h for _, h in body))
        else:
            self.need((head[1] if head else 0.0) + (body[0][1] if body else 0.0) * min(3, len(body)))

        def draw(wrapped, height, *, header, r=None):
            for i, lines in enumerate(wrapped):
                first_col_head = not has_head and i == 0
                fill = _HEADER_FILL if header or first_col_head else None
                self.rect(lefts[i], self.y, widths[i], height, fill=fill)
                right = i in block["numeric"] and not first_col_head
                color = style.HAZARD if r is not None and (r, i) in block["alerts"] else style.TEXT
                bold = header or first_col_head or color == style.HAZARD
                for k, line in enumerate(lines):
                    x = lefts[i] + widths[i] - pad_x if right else lefts[i] + pad_x
                    self.put(x, self.y + pad_y + k * line_h, line, size, bold=bold, color=color,
                             ha="right" if right else "left")
            self.y += height

        if head:
            draw(*head, header=True)
        for r, (wrapped, height) in enumerate(body):
            if height > self.room:
                self.new_page()
                if head:
                    draw(*head, header=True)
            draw(wrapped, height, header=False, r=r)
        self.y += 6.0

    def figure(self, block: dict) -> None:
        import matplotlib.image as mpimg

        image = mpimg.imread(_figure_path(self.folder, block["file"]))
        h_px, w_px = image.shape[:2]
        caption = self.wrap(block["caption"], 7.5, self.width)
        cap_h = len(caption) * 7.5 * 1.3 + 4.0
        width = self.width
        height = width * h_px / w_px
        limit = min(150 * _MM, self.full_height - cap_h)
        if height > limit:
            height, width = limit, limit * w_px / h_px
        self.need(height + cap_h)
        left = _MARGIN_PT["left"] + (self.width - width) / 2
        ax = self.fig.add_axes([self._fx(left), self._fy(self.y + height), width / _A4_PT[0], height / _A4_PT[1]])
        # 'none' hands the pixels to the PDF unresampled, so the figure keeps its full
        # resolution; rows flipped and drawn from the bottom, so the PDF stores them top
        # row first, exactly as the PNG does
        ax.imshow(image[::-1], origin="lower", interpolation="none")
        ax.set_axis_off()
        self.y += height + 3.0
        for line in caption:
            self.put(_MARGIN_PT["left"], self.y, line, 7.5, color=_MUTED)
            self.y += 7.5 * 1.3
        self.y += 6.0

    def bullets(self, items, size: float = 8.6, *, keep: bool = False) -> None:
        if keep:
            self.need(sum(len(self.wrap(i, size, self.width - 12.0)) * size * 1.32 + 1.5 for i in items))
        for item in items:
            lines = self.wrap(item, size, self.width - 12.0)
            self.need(len(lines) * size * 1.32)
            self.put(_MARGIN_PT["left"] + 3.0, self.y, "-", size)
            for line in lines:
                self.put(_MARGIN_PT["left"] + 12.0, self.y, line, size)
                self.y += size * 1.32
            self.y += 1.5
        self.y += 3.0

    def signoff(self, fields) -> None:
        size = 8.6
        label_w = 0.4 * self.width
        laid = [(self.wrap(label, size, label_w - 6.0, bold=True), mm * _MM) for label, mm in fields]
        heights = [max(mm, len(lines) * size * 1.32 + 6.0) for lines, mm in laid]
        self.need(sum(heights))
        for (lines, _), h in zip(laid, heights, strict=True):
            self.rect(_MARGIN_PT["left"], self.y, label_w, h, fill=_HEADER_FILL)
            self.rect(_MARGIN_PT["left"] + label_w, self.y, self.width - label_w, h)
            for k, line in enumerate(lines):
                self.put(_MARGIN_PT["left"] + 3.0, self.y + 3.0 + k * size * 1.32, line, size, bold=True)
            self.y += h
        self.y += 6.0

    def estimate(self, block: dict) -> float:
        """Height (points) of a block, or of what of it must stay with a heading above it."""
        kind = block["kind"]
        if kind == "para":
            size = 7.8 if block["small"] else 9.0
            return len(self.wrap(block["text"], size, self.width)) * size * 1.32 + 4.0
        if kind == "signoff":
            return sum(mm * _MM for _, mm in block["fields"]) + 20.0
        if kind == "list":
            lines = sum(len(self.wrap(i, 8.6, self.width - 12.0)) for i in block["items"])
            return lines * 8.6 * 1.32 + 1.5 * len(block["items"]) if block.get("keep") else 40.0
        if kind == "figure":
            return 0.25 * self.full_height
        _, _, head, body = self.table_layout(block)
        heights = ([head[1]] if head else []) + [h for _, h in body]
        return sum(heights if block["keep"] else heights[:4]) + 6.0

    def section(self, section: dict) -> None:
        blocks = section["blocks"]
        if any(b["kind"] == "signoff" for b in blocks):
            # the sign-off is signed as one piece: never split it from its heading
            self.need(30.0 + sum(self.estimate(b) for b in blocks))
        first = self.estimate(blocks[0]) if blocks else 0.0
        if blocks and blocks[0]["kind"] == "subhead" and len(blocks) > 1:
            first += self.estimate(blocks[1])
        self.heading(section["title"], keep=min(first, 0.4 * self.full_height))
        for k, block in enumerate(blocks):
            if block["kind"] == "subhead":
                following = self.estimate(blocks[k + 1]) if k + 1 < len(blocks) else 0.0
                self.heading(block["text"], 9.5, keep=min(following, 0.4 * self.full_height))
            else:
                self.block(block)

    def block(self, block: dict) -> None:
        kind = block["kind"]
        if kind == "para":
            color = style.HAZARD if block.get("alert") else _MUTED if block["small"] else style.TEXT
            self.paragraph(block["text"], 7.8 if block["small"] else 9.0, color=color, bold=bool(block.get("alert")))
        elif kind == "subhead":
            self.heading(block["text"], 9.5, keep=60.0)
        elif kind == "table":
            self.table(block)
        elif kind == "figure":
            self.figure(block)
        elif kind == "list":
            self.bullets(block["items"], keep=bool(block.get("keep")))
        elif kind == "signoff":
            self.signoff(block["fields"])
        else:
            raise ValueError(f"unknown briefing block kind {kind!r}")

    def footers(self, text: str) -> None:
        n = len(self.pages)
        for k, fig in enumerate(self.pages, start=1):
            y = 1.0 - (_A4_PT[1] - 24.0) / _A4_PT[1]
            fig.text(self._fx(_MARGIN_PT["left"]), y, text, fontsize=7, color="#666666", va="bottom")
            fig.text(self._fx(_A4_PT[0] - _MARGIN_PT["right"]), y, f"page {k} of {n}", fontsize=7, color="#666666",
                     ha="right", va="bottom")


def _column_widths(natural: list[float], minimal: list[float], total: float) -> list[float]:
    """Column widths that fill ``total``: natural widths stretched, or squeezed toward the minima."""
    if sum(natural) <= total:
        extra = total - sum(natural)
        return [w + extra * w / sum(natural) for w in natural]
    if sum(minimal) >= total:
        return [w * total / sum(minimal) for w in minimal]
    slack = [n - m for n, m in zip(natural, minimal, strict=True)]
    share = (total - sum(minimal)) / sum(slack)
    return [m + s * share for m, s in zip(minimal, slack, strict=True)]


def write_pdf(path: Path, folder: Path, content: dict) -> Path:
    """The same content as the HTML, laid out on A4 pages with matplotlib (no browser needed).

    Parameters
    ----------
    path : the PDF to write.
    folder : where the figures named in ``content`` are.
    content : from :func:`brief_content`.

    Returns
    -------
    Path
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.backends.backend_pdf import PdfPages

    # TrueType fonts keep the text searchable and extractable (pdftotext, screen readers)
    with matplotlib.rc_context({"pdf.fonttype": 42, "font.family": "DejaVu Sans", "text.usetex": False,
                                "text.parse_math": False}):
        flow = _Flow(folder)
        try:
            flow.paragraph(f"Pre-trial briefing: {content['site']}", 16, bold=True, after=2.0)
            flow.paragraph(f"Generated by veerwise on {content['created']}. Run folder: {content['run_name']}.", 7.8,
                           color=_MUTED)
            flow.box([(None, content["notice"], True)], edge=style.HAZARD, fill=_NOTICE_FILL)
            for banner in content["banners"]:
                flow.box([(None, banner, True)], edge=style.DISAGREE, fill=_BANNER_FILL)
            flow.box(content["glance"], edge="#bbbbbb", fill=_GLANCE_FILL, lw=0.8, title="At a glance")
            for section in content["sections"]:
                flow.section(section)
            flow.footers(f"veerwise briefing - {content['site']} - for simulation and review only")
            with PdfPages(path, metadata={"Title": f"veerwise briefing - {content['site']}", "Creator": "veerwise",
                                          "CreationDate": None, "ModDate": None}) as pdf:
                for fig in flow.pages:
                    pdf.savefig(fig)
        finally:
            for fig in flow.pages:
                plt.close(fig)
    return Path(path)
