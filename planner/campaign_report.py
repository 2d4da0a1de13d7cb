"""A campaign's table, figure and briefing page, from its scenarios' outcomes.

``campaign.csv`` / ``campaign.json``: one row per scenario and route with P(incident),
expected length, the convergence and grid-check verdicts and the run folder.
``campaign.png``: P(incident) of each start/goal pair against drift case, one panel per
vehicle and route. ``campaign.html``: the scenarios above the campaign's risk limit
first, then the rest, then the failed ones. Every file says the plans are for
simulation and review only.
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np

from planner import notation

#: Printed in every campaign file.
NOTICE = ("For simulation and review only; not approved for field operation. Follow the site's safety rules, "
          "certified operators and local regulations.")
#: Columns of campaign.csv, in order.
COLUMNS = ("scenario", "pair", "vehicle", "drift_case", "drift_scale", "bearing_change_deg", "route", "status",
           "p_incident", "mc_p_incident", "mc_lo", "mc_hi", "p_goal", "expected_length_m", "route_length_m",
           "reached_goal", "converged", "seed_routes_matching", "n_seeds", "grid_check", "p_incident_half_cell",
           "above_risk_limit", "run_folder", "run_id", "identity", "root_seed", "elapsed_s", "error")


def outcome_line(job, outcome: dict, k: int, n: int) -> str:
    """One line per finished scenario for the progress display."""
    head = f"[{k}/{n}] {job.scenario.name}"
    if outcome["status"] == "failed":
        return f"{head}: FAILED: {outcome['error']}"
    what = "already finished, skipped" if outcome["status"] == "skipped" else f"done in {outcome['elapsed_s']:.0f} s"
    figures = "; ".join(f"{r['route']} P(incident) {notation.probability(r['p_incident'])}"
                        for r in outcome.get("routes", ()))
    return f"{head}: {what}; {figures}"


def table_rows(plan, run) -> list[dict]:
    """Rows of campaign.csv: one per scenario and route (a failed scenario gets one row with its error)."""
    limit = plan.campaign.risk_limit
    rows = []
    for job, outcome in zip(plan.jobs, run.outcomes, strict=True):
        s = job.scenario
        base = {"scenario": s.name, "pair": s.pair.name, "vehicle": s.vehicle.name, "drift_case": s.drift.name,
                "drift_scale": s.drift.scale, "bearing_change_deg": s.drift.bearing_change_deg,
                "status": outcome["status"], "run_folder": outcome["folder"], "identity": job.identity,
                "root_seed": str(job.seed), "elapsed_s": outcome.get("elapsed_s"), "error": outcome.get("error")}
        if outcome["status"] == "failed":
            rows.append({**{c: None for c in COLUMNS}, **base, "run_folder": None})
            continue
        for route in outcome["routes"]:
            p = route["p_incident"]
            rows.append({**{c: None for c in COLUMNS}, **base, **route,
                         "above_risk_limit": p is not None and p > limit})
    return rows


def csv_text(rows: list[dict]) -> str:
    """campaign.csv: full floats, names guarded against spreadsheet formulas."""
    from planner.names import csv_cell

    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(COLUMNS)
    for row in rows:
        cells = []
        for c in COLUMNS:
            v = row.get(c)
            if v is None:
                cells.append("")
            elif isinstance(v, bool):
                cells.append("true" if v else "false")
            elif isinstance(v, float):
                cells.append(repr(v))
            elif isinstance(v, str):
                cells.append(csv_cell(v))
            else:
                cells.append(str(v))
        writer.writerow(cells)
    return out.getvalue()


def json_record(plan, run, rows: list[dict]) -> dict:
    """campaign.json: the campaign, its counts and every row."""
    c = plan.campaign
    return {
        "format": "veerwise-campaign", "format_version": 1, "notice": NOTICE,
        "campaign": {"file": str(c.path), "sha256": c.sha256, "site": str(c.site_path), "seed": c.seed,
                     "risk_limit": c.risk_limit},
        "counts": {k: sum(o["status"] == k for o in run.outcomes) for k in ("done", "skipped", "failed")},
        "n_scenarios": len(plan.jobs), "n_workers": run.n_workers, "elapsed_s": round(run.elapsed_s, 2),
        "rows": [{k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in row.items()}
                 for row in rows],
    }


def heat_map(plan, rows: list[dict], path) -> None:
    """campaign.png: P(incident) per pair (rows) and drift case (columns); one panel per vehicle and route."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.colors import LogNorm

    from planner import style

    c = plan.campaign
    pairs = [p.name for p in c.pairs]
    drifts = [d.name for d in c.drifts]
    vehicles = [v.name for v in c.vehicles]
    routes = ("cautious", "shortest")
    values = {(r["vehicle"], r["route"], r["pair"], r["drift_case"]): r for r in rows if r["route"]}
    failed = {(r["vehicle"], r["pair"], r["drift_case"]) for r in rows if r["status"] == "failed"}
    shown = [r["p_incident"] for r in values.values() if r["p_incident"] is not None]
    floor = style.RISK_FLOOR
    top = max([c.risk_limit * 10, *shown, floor * 10])
    norm = LogNorm(vmin=floor, vmax=min(1.0, top))
    width = min(18.0, 2.6 + 1.15 * len(drifts) * len(vehicles) + 0.4 * len(vehicles))
    height = 1.4 + 2 * (0.45 * len(pairs) + 0.9)
    plt.rcParams.update({"font.size": style.FONT_SIZE, "text.parse_math": False, "text.usetex": False})
    fig, axes = plt.subplots(len(routes), len(vehicles), figsize=(width, height), squeeze=False,
                             constrained_layout=True)
    image = None
    for i, route in enumerate(routes):
        for j, vehicle in enumerate(vehicles):
            ax = axes[i][j]
            grid = np.full((len(pairs), len(drifts)), np.nan)
            for a, pair in enumerate(pairs):
                for b, drift in enumerate(drifts):
                    row = values.get((vehicle, route, pair, drift))
                    if row is not None and row["p_incident"] is not None:
                        grid[a, b] = max(row["p_incident"], floor)
            cmap = matplotlib.colormaps[style.RISK_CMAP].copy()
            cmap.set_bad(style.OUTSIDE)
            image = ax.imshow(grid, cmap=cmap, norm=norm, aspect="auto")
            for a, pair in enumerate(pairs):
                for b, drift in enumerate(drifts):
                    row = values.get((vehicle, route, pair, drift))
                    if (vehicle, pair, drift) in failed:
                        text = "failed"
                    elif row is None:
                        text = ""
                    else:
                        text = notation.percent(row["p_incident"])
                    if row is not None and row["above_risk_limit"]:
                        ax.add_patch(matplotlib.patches.Rectangle((b - 0.5, a - 0.5), 1, 1, fill=False,
                                                                  edgecolor=style.HAZARD, linewidth=2.0))
                    dark = not np.isnan(grid[a, b]) and norm(grid[a, b]) < 0.5
                    ax.text(b, a, text, ha="center", va="center", fontsize=style.FONT_SIZE - 2,
                            color="#ffffff" if dark else style.TEXT)
            ax.set_xticks(range(len(drifts)), drifts, rotation=30, ha="right")
            ax.set_yticks(range(len(pairs)), pairs if j == 0 else [""] * len(pairs))
            ax.set_title(f"{vehicle}: {style.POLICY[route]['label']}", fontsize=style.FONT_SIZE)
    bar = fig.colorbar(image, ax=axes, shrink=0.8)
    ticks = [t for t in (1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1.0) if norm.vmin <= t <= norm.vmax]
    bar.set_ticks(ticks, labels=[notation.percent(t) for t in ticks])
    bar.ax.minorticks_off()
    bar.set_label("P(incident), log scale")
    fig.suptitle(f"P(incident) per start/goal pair and drift case (framed: above {notation.percent(c.risk_limit)})"
                 f"\n{style.FIGURE_NOTICE}", fontsize=style.FONT_SIZE)
    fig.savefig(path, dpi=150, format="png")
    plt.close(fig)


def brief_html(plan, run, rows: list[dict]) -> str:
    """campaign.html: scenarios above the risk limit first, the rest after, failures last."""
    from jinja2 import Environment, PackageLoader, StrictUndefined

    c = plan.campaign
    shown = []
    for row in rows:
        if row["status"] == "failed":
            continue
        shown.append({**row, "p_text": notation.probability(row["p_incident"]),
                      "length_text": "-" if row["expected_length_m"] is None else f"{row['expected_length_m']:.1f} m",
                      "converged_text": "converged" if row["converged"] else "NOT converged"})
    above = sorted((r for r in shown if r["above_risk_limit"]), key=lambda r: -(r["p_incident"] or 0.0))
    below = [r for r in shown if not r["above_risk_limit"]]
    failed = [r for r in rows if r["status"] == "failed"]
    env = Environment(loader=PackageLoader("planner", "templates"), autoescape=True, undefined=StrictUndefined,
                      keep_trailing_newline=True)
    return env.get_template("campaign.html.j2").render(
        notice=NOTICE, campaign=str(c.path), site=str(c.site_path), seed=c.seed,
        limit=notation.probability(c.risk_limit), n=len(plan.jobs), above=above, below=below, failed=failed,
        counts={k: sum(o["status"] == k for o in run.outcomes) for k in ("done", "skipped", "failed")})


def write_report(plan, run, out_dir) -> list[Path]:
    """Write campaign.csv, campaign.json, campaign.png and campaign.html into ``out_dir`` (each atomically)."""
    from planner.export import atomic_output

    out = Path(out_dir)
    rows = table_rows(plan, run)
    written = []
    for name, text in (("campaign.csv", csv_text(rows)),
                       ("campaign.json", json.dumps(json_record(plan, run, rows), indent=1, allow_nan=False) + "\n"),
                       ("campaign.html", brief_html(plan, run, rows))):
        with atomic_output(out / name) as tmp:
            tmp.write_bytes(text.encode("utf-8"))
        written.append(out / name)
    with atomic_output(out / "campaign.png") as tmp:
        heat_map(plan, rows, tmp)
    written.append(out / "campaign.png")
    return written
