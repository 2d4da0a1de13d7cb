"""The briefing: one self-contained HTML page (and a PDF of the same content) that a
safety reviewer reads and signs before a field trial.

This stage owns the briefing's content and layout. It takes finished results (no
computation of its own beyond formatting), embeds every figure as a data URI so the
page needs no network and no other file, and prints well on A4.
"""

from __future__ import annotations

import base64
import html
import math
from dataclasses import dataclass
from pathlib import Path

from planner import style

#: The two policies, in the order the briefing shows them.
POLICIES = tuple(style.POLICY)

#: The cautions of SAFETY.md, in short, printed in every briefing.
CAUTIONS = (
    "For simulation and review only. Not approved for field operation.",
    "The site's safety rules, certified operators and local regulations take precedence over anything here.",
    "Only hazards drawn in the site file exist for the model: people, vehicles and temporary obstacles do not.",
    "Execution error and drift are simple random models; real errors are correlated and can be larger.",
    "Probabilities are exact for the model, not for the yard. Use them to compare routes, not as failure rates.",
    "No altitude, speed, turning, braking, battery or link limits are modelled.",
    "Walk or inspect the route and compare the site file with the yard as it is today before any trial.",
)

_CSS = """
@page { size: A4; margin: 14mm 13mm 16mm 13mm; }
body { font-family: "DejaVu Sans", Arial, sans-serif; font-size: 10pt; color: #222; max-width: 190mm;
       margin: 0 auto; line-height: 1.35; }
h1 { font-size: 17pt; margin: 0 0 2mm 0; }
h2 { font-size: 12.5pt; margin: 6mm 0 2mm 0; border-bottom: 1px solid #bbb; padding-bottom: 1mm;
     break-after: avoid; page-break-after: avoid; }
.notice { border: 2px solid #a8412a; background: #fbeee9; padding: 2.5mm 3mm; font-weight: bold; margin: 3mm 0; }
.banner { border: 2px solid #7b3fa0; background: #f3ebf8; padding: 2.5mm 3mm; font-weight: bold; margin: 3mm 0; }
.ok { color: #2e7d4f; font-weight: bold; }
.bad { color: #a8412a; font-weight: bold; }
table { border-collapse: collapse; width: 100%; margin: 2mm 0; font-size: 9pt; break-inside: avoid;
        page-break-inside: avoid; }
th, td { border: 1px solid #ccc; padding: 1mm 1.6mm; text-align: left; vertical-align: top; }
th { background: #f1efe9; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
figure { margin: 2mm 0 4mm 0; break-inside: avoid; page-break-inside: avoid; }
figure img { max-width: 100%; max-height: 205mm; display: block; margin: 0 auto; }
figcaption { font-size: 8.5pt; color: #555; margin-top: 1mm; }
.signoff td { height: 11mm; }
.small { font-size: 8.5pt; color: #555; }
.pagebreak { break-before: page; page-break-before: always; }
"""


def _esc(value) -> str:
    return html.escape(str(value))


def _img(path: Path, alt: str, caption: str) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    return (f'<figure><img alt="{_esc(alt)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{_esc(caption)}</figcaption></figure>")


def _table(headers, rows, numeric=()) -> str:
    head = "".join(f'<th class="num">{_esc(h)}</th>' if i in numeric else f"<th>{_esc(h)}</th>"
                   for i, h in enumerate(headers))
    body = []
    for row in rows:
        cells = "".join(f'<td class="num">{_esc(v)}</td>' if i in numeric else f"<td>{_esc(v)}</td>"
                        for i, v in enumerate(row))
        body.append(f"<tr>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _metres(value) -> str:
    return "-" if value is None or not math.isfinite(value) else f"{value:.1f}"


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
    """Everything the briefing states, as plain data (shared by the HTML and the PDF)."""
    from planner.risk import format_prob

    settings, manifest = inputs.settings, inputs.manifest
    eps = settings.learn.epsilon
    site, grid = inputs.site, inputs.grid
    policies = []
    for name in POLICIES:
        route, conv = inputs.routes[name], manifest["results"][name]
        row = _row(inputs.risk_rows, name, eps, 1.0)
        policies.append({
            "name": name,
            "method": "SARSA (on-policy)" if name == "cautious" else "Q-learning (off-policy)",
            "length_m": route.length_m, "moves": route.n_moves, "waypoints": len(route.waypoints),
            "reached_goal": route.reached_goal, "end_event": route.end_event,
            "min_clearance_m": route.min_clearance_m, "min_clearance_hazard": route.min_clearance_hazard,
            "p_incident": format_prob(row.p_incident) if row else "-",
            "p_goal": format_prob(row.p_goal) if row else "-",
            "converged": conv["converged"], "message": conv["message"], "agreement": conv["agreement"],
            "value_gap_m": math.inf if conv["value_gap_m"] is None else conv["value_gap_m"],
            "seed_routes_matching": conv["seed_routes_matching"], "n_seeds": conv["n_seeds"],
        })
    dyn, learn, spec = settings.dynamics, settings.learn, settings.grid
    assumptions = [
        ("Site file", f"{Path(manifest['input']['site']).name} (sha256 {site.sha256[:16]}...)"),
        ("Working frame", f"{'local transverse Mercator' if site.frame.kind == 'local-tmerc' else site.frame.crs}; "
                          f"largest scale distortion {site.scale_distortion:.1e}"),
        ("Grid", f"{grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m; a cell is hazard if a buffered "
                 f"hazard covers more than {spec.hazard_overlap:g} of it, inside if the boundary covers at least "
                 f"{spec.boundary_cover:g}"),
        ("Moves", f"{dyn.n_actions} directions; slip {dyn.slip:g} (to a neighbouring direction), stall {dyn.stall:g}"),
        ("Drift", f"as drawn, scale {dyn.drift_scale:g}; sensitivity rows at "
                  f"{', '.join(f'{m:g}' for m in settings.drift_scales)}"),
        ("Execution noise", f"{eps:g} (share of moves made at random) for the cautious policy and the headline "
                            f"figures; table at {', '.join(f'{n:g}' for n in settings.noises)}"),
        ("Leaving the boundary", "an incident that ends the run" if dyn.edge == "boundary" else "blocked (wall)"),
        ("Hazard penalty", f"{manifest['model']['boundary_penalty_m']:g} m-equivalent unless the site sets one per hazard"),
        ("Learning", f"{learn.n_seeds} seeds x {learn.episodes:,} episodes per learner, step size "
                     f"{learn.step_size:g}" + (f" (1/n^{learn.step_decay:g})" if learn.step_decay else "")
                     + f", gamma {learn.gamma:g}, starts '{learn.start_mode}', Q init '{learn.q_init}'"),
        ("Seed", f"root entropy {manifest['seeds']['entropy']}"),
        ("Monte Carlo", f"{settings.rollouts:,} rollouts per risk row, Wilson 95% intervals"),
        ("Versions", ", ".join(f"{k} {v}" for k, v in manifest["versions"].items() if k != "platform")),
    ]
    return {"site": site.name, "created": manifest["created_utc"], "policies": policies,
            "assumptions": assumptions, "warnings": manifest.get("warnings", []),
            "converged": all(p["converged"] for p in policies), "noise": eps}


def _row(rows, policy, noise, drift_scale):
    for row in rows:
        if row.policy == policy and math.isclose(row.noise, noise) and math.isclose(row.drift_scale, drift_scale):
            return row
    return None


def render_html(content: dict, inputs: BriefInputs) -> str:
    """The briefing page, with every figure embedded."""
    from planner.risk import format_prob

    folder = inputs.folder
    p = {x["name"]: x for x in content["policies"]}
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
             f"<title>yardplan briefing - {_esc(content['site'])}</title><style>{_CSS}</style></head><body>"]
    parts.append(f"<h1>Pre-trial briefing: {_esc(content['site'])}</h1>")
    parts.append(f"<p class='small'>Generated by yardplan on {_esc(content['created'])}. "
                 f"Run folder: {_esc(inputs.run_name or folder.name)}.</p>")
    parts.append("<div class='notice'>FOR SIMULATION AND REVIEW ONLY - not approved for field operation. "
                 "The site's safety rules, certified operators and local regulations take precedence.</div>")
    if not content["converged"]:
        bad = [x["name"] for x in content["policies"] if not x["converged"]]
        parts.append(f"<div class='banner'>TRAINING HAS NOT CONVERGED for the {' and '.join(bad)} "
                     "policy: its route may not be the best the model allows. Do not sign this briefing; re-run "
                     "with more episodes.</div>")
    if any(not x["reached_goal"] for x in content["policies"]):
        parts.append("<div class='banner'>A nominal route does not reach the goal (see below).</div>")

    parts.append("<h2>1. Which route, and how risky</h2>")
    rows = []
    for name in POLICIES:
        x = p[name]
        clearance = (f"{_metres(x['min_clearance_m'])} m to {x['min_clearance_hazard']}"
                     if x["min_clearance_hazard"] else "no hazards")
        rows.append([name, x["method"], f"{x['length_m']:.1f}", x["moves"], x["waypoints"], clearance,
                     x["p_incident"], x["p_goal"], "converged" if x["converged"] else "NOT CONVERGED"])
    parts.append(_table(["policy", "learned by", "length (m)", "moves", "waypoints", "closest approach",
                         f"P(incident) at noise {content['noise']:g}", "P(goal)", "training"], rows,
                        numeric=(2, 3, 4, 6, 7)))
    c, s = p["cautious"], p["shortest"]
    parts.append(f"<p>The cautious route is {c['length_m'] - s['length_m']:+.1f} m longer than the shortest; its "
                 f"incident probability at execution noise {content['noise']:g} is {c['p_incident']} against "
                 f"{s['p_incident']} for the shortest. Nominal routes follow each policy's intended move and its "
                 "most likely outcome.</p>")
    parts.append(_img(folder / "routes.png", "map with both routes",
                      "Site, zones, drift arrows and both nominal routes with their waypoints; shaded cells are "
                      "where the two policies would choose differently."))

    parts.append("<h2>2. Risk table and sensitivity</h2>")
    parts.append("<p class='small'>Exact absorbing-chain probabilities for each policy (and the exact references) "
                 "under execution noise and drift scale; Monte Carlo estimates with Wilson 95% intervals check the "
                 "computation. A '!' marks a row whose exact figure falls outside its interval.</p>")
    risk_rows = []
    for row in inputs.risk_rows:
        flag = "!" if row.mc_disagrees else ""
        inc = row.mc.get("incident")
        mc = f"{format_prob(inc.estimate)} [{format_prob(inc.lo)}, {format_prob(inc.hi)}]" if inc else "-"
        worst = max(row.p_by_event.items(), key=lambda kv: kv[1]) if row.p_by_event else ("-", 0.0)
        risk_rows.append([row.policy, f"{row.noise:g}", f"{row.drift_scale:g}", format_prob(row.p_goal),
                          format_prob(row.p_incident) + flag, mc,
                          f"{worst[0]} {format_prob(worst[1])}" if worst[1] > 0 else "-",
                          format_prob(row.p_never)])
    parts.append(_table(["policy", "noise", "drift x", "P(goal)", "P(incident)", "Monte Carlo [95%]",
                         "largest share", "P(never ends)"], risk_rows, numeric=(1, 2, 3, 4)))
    parts.append(_img(folder / "sensitivity.png", "sensitivity chart",
                      "Incident probability against execution noise; thicker lines for stronger drift."))
    parts.append(_img(folder / "riskmap.png", "risk maps",
                      f"Probability of an incident before the goal from each cell, at noise {content['noise']:g}."))

    parts.append("<h2>3. Is the answer trustworthy?</h2>")
    conv_rows = [[x["name"], x["method"], f"{100 * x['agreement']:.1f}%", _metres(x["value_gap_m"]),
                  f"{x['seed_routes_matching']} of {x['n_seeds']}", x["message"]] for x in content["policies"]]
    parts.append(_table(["policy", "learned by", "agreement with exact", "value gap (m)", "seed routes matching",
                         "verdict"], conv_rows, numeric=(2, 3)))
    parts.append("<p class='small'>Agreement: share of the states the policy visits (weighted by how often) where "
                 "its action is optimal for the exact solution of the same model. Value gap: how much worse, in "
                 "metres-equivalent, the learned policy is at the start than the exact one.</p>")
    parts.append(_img(folder / "learning.png", "learning curves",
                      "Return per episode (moving average; line = mean over seeds, band = range) and the share of "
                      "training episodes that ended in an incident."))

    parts.append("<h2>4. Routes and clearances</h2>")
    for name in POLICIES:
        route = inputs.routes[name]
        wrows = [[w.seq, f"{w.east_m:.1f}", f"{w.north_m:.1f}", f"{w.lat:.7f}", f"{w.lon:.7f}", f"{w.leg_m:.1f}",
                  f"{w.cumulative_m:.1f}", _metres(w.clearance_m), w.nearest_hazard or "-"] for w in route.waypoints]
        parts.append(f"<h3>{_esc(name)} route: {route.length_m:.1f} m, {len(route.waypoints)} waypoints</h3>")
        parts.append(_table(["#", "east (m)", "north (m)", "lat", "lon", "leg (m)", "total (m)", "clearance (m)",
                             "nearest hazard"], wrows, numeric=(0, 1, 2, 3, 4, 5, 6, 7)))

    parts.append("<h2>5. Assumptions</h2>")
    parts.append(_table(["setting", "value"], content["assumptions"]))
    if content["warnings"]:
        parts.append("<p><b>Warnings raised while planning:</b></p><ul>"
                     + "".join(f"<li>{_esc(w)}</li>" for w in content["warnings"]) + "</ul>")

    parts.append("<h2>6. Cautions</h2><ul>" + "".join(f"<li>{_esc(c)}</li>" for c in CAUTIONS) + "</ul>")
    parts.append("<h2>7. Sign-off</h2>")
    parts.append("<table class='signoff'><tbody>"
                 "<tr><th style='width:32%'>Reviewed by (name, role)</th><td></td></tr>"
                 "<tr><th>Date</th><td></td></tr>"
                 "<tr><th>Decision (approve for simulation / approve for field trial under site rules / "
                 "refuse)</th><td></td></tr>"
                 "<tr><th>Conditions and remarks</th><td style='height:22mm'></td></tr>"
                 "<tr><th>Signature</th><td></td></tr></tbody></table>")
    parts.append("</body></html>")
    return "\n".join(parts)


def write_brief(inputs: BriefInputs, html_path, pdf_path) -> tuple[Path, Path]:
    """Write the briefing as HTML and as PDF (each atomically)."""
    from planner.export import atomic_output

    content = brief_content(inputs)
    page = render_html(content, inputs)
    with atomic_output(html_path) as tmp:
        tmp.write_text(page, encoding="utf-8")
    with atomic_output(pdf_path) as tmp:
        write_pdf(tmp, inputs.folder, content)
    return Path(html_path), Path(pdf_path)


def write_pdf(path: Path, folder: Path, content: dict) -> Path:
    """The same content as the HTML, laid out on A4 pages with matplotlib (no browser needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.image as mpimg
    import matplotlib.pyplot as plt
    from matplotlib.backends.backend_pdf import PdfPages

    a4 = (8.27, 11.69)
    p = {x["name"]: x for x in content["policies"]}
    with PdfPages(path, metadata={"Title": f"yardplan briefing - {content['site']}", "Creator": "yardplan",
                                  "CreationDate": None, "ModDate": None}) as pdf:
        fig = plt.figure(figsize=a4)
        y = 0.96

        def text(s, size=9, weight="normal", color="#222222", gap=0.018):
            nonlocal y
            fig.text(0.06, y, s, fontsize=size, weight=weight, color=color, va="top", wrap=True)
            y -= gap

        text(f"Pre-trial briefing: {content['site']}", 15, "bold", gap=0.03)
        text(f"Generated by yardplan on {content['created']}", 8, color="#555555")
        text("FOR SIMULATION AND REVIEW ONLY - not approved for field operation.", 10, "bold", "#a8412a")
        text("The site's safety rules, certified operators and local regulations take precedence.", 9,
             color="#a8412a", gap=0.03)
        if not content["converged"]:
            text("TRAINING HAS NOT CONVERGED - do not sign; re-run with more episodes.", 10, "bold", "#7b3fa0",
                 gap=0.03)
        text("1. Which route, and how risky", 12, "bold", gap=0.025)
        for name in POLICIES:
            x = p[name]
            clearance = (f"closest approach {_metres(x['min_clearance_m'])} m to {x['min_clearance_hazard']}"
                         if x["min_clearance_hazard"] else "no hazards")
            text(f"{name}: {x['length_m']:.1f} m, {x['moves']} moves, {x['waypoints']} waypoints, {clearance}", 9.5)
            text(f"    P(incident) at noise {content['noise']:g}: {x['p_incident']}    P(goal): {x['p_goal']}    "
                 f"training: {'converged' if x['converged'] else 'NOT CONVERGED'}", 9.5, gap=0.024)
        text("3. Is the answer trustworthy?", 12, "bold", gap=0.025)
        for x in content["policies"]:
            text(f"{x['name']}: {x['message']}", 9)
        y -= 0.01
        text("5. Assumptions", 12, "bold", gap=0.025)
        for key, value in content["assumptions"]:
            text(f"{key}: {value}"[:150], 7.5, gap=0.016)
        y -= 0.01
        text("6. Cautions", 12, "bold", gap=0.025)
        for c in CAUTIONS:
            text(f"- {c}", 8, gap=0.016)
        pdf.savefig(fig)
        plt.close(fig)

        for name, caption in (("routes.png", "2. Map with both nominal routes"),
                              ("sensitivity.png", "2. Sensitivity of the incident probability"),
                              ("riskmap.png", "2. Risk maps"), ("learning.png", "3. Learning curves")):
            fig = plt.figure(figsize=a4)
            fig.text(0.06, 0.96, caption, fontsize=12, weight="bold", va="top")
            ax = fig.add_axes([0.05, 0.08, 0.9, 0.84])
            ax.imshow(mpimg.imread(folder / name))
            ax.axis("off")
            fig.text(0.06, 0.03, "yardplan - for simulation and review only", fontsize=7, color="#666666")
            pdf.savefig(fig)
            plt.close(fig)

        fig = plt.figure(figsize=a4)
        fig.text(0.06, 0.96, "7. Sign-off", fontsize=12, weight="bold", va="top")
        for i, label in enumerate(("Reviewed by (name, role)", "Date",
                                   "Decision (approve for simulation / approve for field trial under site rules / "
                                   "refuse)", "Conditions and remarks", "Signature")):
            top = 0.9 - i * 0.09
            fig.text(0.06, top, label, fontsize=9.5, va="top")
            fig.add_artist(plt.Line2D([0.06, 0.94], [top - 0.055, top - 0.055], color="#888888", lw=0.8))
        pdf.savefig(fig)
        plt.close(fig)
    return path
