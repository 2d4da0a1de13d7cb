"""``plan --risk-budget``: the within-budget route as a third route in every output, the
trade-off curve and the causes of risk in risk.json and the briefing, bad budgets refused.

One small plan on the in-memory test site (as in test_cli_plan.py) with a budget is
shared by the module; the demo-site checks use the library directly.
"""

from __future__ import annotations

import csv
import json
import math
import re
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from conftest import plan_small_site, small_site_dict

from planner.cli import cli

SMALL = ["--cell", "2", "--episodes", "2000", "--max-sweeps", "4", "--training-runs", "2", "--rollouts", "300",
         "--root-seed", "5"]
BUDGET = 1e-3
MAPS = Path(__file__).parents[1] / "maps"


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


@pytest.fixture(scope="module")
def planned(tmp_path_factory):
    """(site path, run folder, CliRunner result) of one small plan with a risk budget."""
    return plan_small_site(tmp_path_factory.mktemp("budget"), *SMALL, "--risk-budget", BUDGET,
                           "--budget-set-by", "R. Okafor, range safety officer")


def records(folder) -> list[dict]:
    return json.loads((Path(folder) / "risk.json").read_text())


def headline(folder, policy) -> dict:
    return next(r for r in records(folder) if r["policy"] == policy and r["noise"] == 0.1 and r["drift_scale"] == 1)


def brief_text(folder) -> str:
    page = (Path(folder) / "brief.html").read_text()
    page = re.sub(r"<img[^>]*>", "", page)
    return " ".join(re.sub(r"<[^>]+>", " ", page).replace("&#39;", "'").split())


def test_plan_with_a_budget_writes_the_third_route_everywhere(planned):
    _, out, result = planned
    assert result.exit_code == 0, result.output
    for name in ("routes-budget.geojson", "waypoints-budget.csv", "tradeoff.png", "failure-paths.png"):
        assert (out / name).stat().st_size > 0, name
    with np.load(out / "policies.npz") as npz:
        assert npz["greedy_budget"].dtype == np.int64
    # the waypoint files say which route and that they are for simulation only
    geo = json.loads((out / "routes-budget.geojson").read_text())
    assert {f["properties"].get("policy") for f in geo["features"]} == {"budget"}
    assert "simulation" in json.dumps(geo).lower()
    rows = list(csv.reader(line for line in (out / "waypoints-budget.csv").read_text().splitlines()
                           if not line.startswith("#")))
    assert rows[0][0] == "policy" and all(r[0] == "budget" for r in rows[1:])
    # a row of the risk table per noise level and drift scale, like every other policy
    assert sum(r["policy"] == "budget" for r in records(out)) == 4 * 3
    lines = result.stdout.splitlines()
    assert any(line.startswith("budget ") for line in lines)
    text = " ".join(" ".join(lines).split())
    assert "the shortest route that meets it has P(incident)" in text


def test_the_budget_record_is_consistent_with_the_risk_table(planned):
    _, out, _ = planned
    row = headline(out, "budget")
    record = row["risk_budget"]
    assert record["budget"] == BUDGET and record["set_by"] == "R. Okafor, range safety officer"
    # the delivered route meets the budget, by the risk table's own exact solve of it
    assert record["met"] and row["p_incident"] <= BUDGET
    assert math.isclose(row["p_incident"], record["route"]["p_incident"], rel_tol=1e-8, abs_tol=1e-13)
    assert math.isclose(record["gap"], BUDGET - row["p_incident"], rel_tol=1e-6, abs_tol=1e-13)
    # the riskier neighbour breaks it, and mixing the two at the reported share meets it exactly
    shorter, route, share = record["shorter"], record["route"], record["mix_share"]
    assert shorter["p_incident"] > BUDGET and shorter["length_m"] < route["length_m"]
    assert math.isclose(share * shorter["p_incident"] + (1 - share) * route["p_incident"], BUDGET, rel_tol=1e-9)
    assert math.isclose(record["mixed_length_m"], share * shorter["length_m"] + (1 - share) * route["length_m"],
                        rel_tol=1e-9)
    assert record["n_solves"] >= 2
    # the curve: P(incident) falls and length rises along it, and the budget route is one of its vertices
    curve = record["curve"]
    p = [c["p_incident"] for c in curve]
    length = [c["length_m"] for c in curve]
    assert all(a > b for a, b in zip(p, p[1:], strict=False))
    assert all(a < b for a, b in zip(length, length[1:], strict=False))
    assert any(math.isclose(c["p_incident"], route["p_incident"], rel_tol=1e-9) for c in curve)
    # the lower convex hull: no vertex lies above the chord of its neighbours, beyond the
    # tolerance each solve is optimal to (ties within --tie-m 1 cm are broken by safety)
    for k in range(1, len(curve) - 1):
        t = (p[k - 1] - p[k]) / (p[k - 1] - p[k + 1])
        chord = length[k - 1] + t * (length[k + 1] - length[k - 1])
        assert length[k] <= chord + 0.02, (k, curve[k - 1: k + 2])


def test_leg_shares_sum_to_each_routes_risk_row(planned):
    _, out, _ = planned
    for name in ("cautious", "shortest", "budget"):
        row = headline(out, name)
        causes = row["causes"]
        total = sum(leg["p_incident"] for leg in causes["legs"])
        # the risk table's P(incident) is its own absorbing-chain solve, apart from the leg split
        assert abs(total - row["p_incident"]) <= 1e-9, name
        assert abs(sum(sum(leg["by_zone"].values()) for leg in causes["legs"]) - total) <= 1e-12
        for f in causes["paths"]:
            assert 0 < f["probability"] <= row["p_incident"] + 1e-12
            assert len(f["east_m"]) == len(f["north_m"]) == f["moves"]
            assert f["off_policy"], "a failure needs at least one move off the likeliest landing"


def test_the_briefing_shows_the_budget_route_the_curve_and_the_causes(planned):
    _, out, _ = planned
    text = brief_text(out)
    assert "2. The route within the risk budget, and why each route is risky" in text
    assert "How length trades against risk" in text and "Why each route is risky" in text
    for name in ("cautious", "shortest", "within-budget"):
        assert f"{name} route: P(incident)" in text
    assert "set by R. Okafor, range safety officer" in text
    # the sign-off offers the third route and states the budget
    signoff = text[text.index("Sign-off"):]
    assert "within-budget route" in signoff and "Risk budget" in signoff
    # sections after the inserted one are renumbered, and references to them follow
    assert "4. Is the answer trustworthy?" in text and "Section 6 lists every setting" in text
    page = (out / "brief.html").read_text()
    assert page.count("data:image/png;base64,") == 6  # routes, riskmap, sensitivity, learning, tradeoff, paths


def test_without_a_name_the_signoff_leaves_a_field_for_who_set_the_budget(tmp_path):
    from planner.brief import BriefInputs, brief_content
    from planner.budget_plan import extras_from_records
    from planner.runload import load_run, rebuild, run_routes

    _, out, result = plan_small_site(tmp_path, *SMALL, "--rollouts", "0", "--risk-budget", "0.2", "--no-grid-check")
    assert result.exit_code == 0, result.output
    loaded = load_run(out)
    site, grid, model = rebuild(loaded)
    budget, causes = extras_from_records(records(out))
    from planner.risk import RiskRow

    inputs = BriefInputs(folder=out, site=site, grid=grid, routes=run_routes(loaded, site, grid, model),
                         risk_rows=[RiskRow.from_dict(r) for r in records(out)], settings=loaded.settings,
                         manifest=loaded.manifest, run_name="run", budget=budget, causes=causes)
    content = brief_content(inputs)
    signoff = content["sections"][-1]["blocks"][-1]
    assert signoff["fields"][0][0] == "Risk budget set by (name, role)"
    assert budget["set_by"] is None


def test_brief_and_export_read_the_budget_route_back(planned, tmp_path):
    import shutil

    _, out, _ = planned
    copy = tmp_path / "run"
    shutil.copytree(out, copy)
    before = brief_text(copy)
    result = run("brief", copy)
    assert result.exit_code == 0, result.output
    assert before.count("within-budget") == brief_text(copy).count("within-budget")
    result = run("export", copy, "-o", tmp_path / "b.gpx", "--policy", "budget")
    assert result.exit_code == 0, result.output
    assert "<name>budget</name>" in (tmp_path / "b.gpx").read_text()
    result = run("export", copy, "-o", tmp_path / "all.geojson", "--policy", "all")
    assert result.exit_code == 0, result.output
    policies = {f["properties"]["policy"] for f in json.loads((tmp_path / "all.geojson").read_text())["features"]}
    assert policies == {"cautious", "shortest", "budget"}
    result = run("risk", copy, "--policy", "budget", "--table-noises", "0.1", "--table-drifts", "1", "--rollouts", "0")
    assert result.exit_code == 0, result.output
    assert re.search(r"^budget\b", result.stdout, flags=re.M), result.stdout


@pytest.mark.parametrize("bad", ["-1e-3", "0", "1", "1.5", "abc", "nan", "inf", ""])
def test_bad_budgets_are_refused_in_one_line_before_anything_is_written(tmp_path, bad, no_heavy_work):
    site = tmp_path / "site.geojson"
    site.write_text(json.dumps(small_site_dict()))
    result = CliRunner().invoke(cli, ["plan", str(site), str(tmp_path / "run"), "--risk-budget", bad])
    assert result.exit_code == 2, result.output
    assert len(result.stderr.strip().splitlines()) == 1, result.stderr
    assert "--risk-budget" in result.stderr and "Traceback" not in result.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site.geojson"]


def test_a_budget_setter_without_a_budget_is_refused(tmp_path, no_heavy_work):
    site = tmp_path / "site.geojson"
    site.write_text(json.dumps(small_site_dict()))
    result = CliRunner().invoke(cli, ["plan", str(site), str(tmp_path / "run"), "--budget-set-by", "A. Person"])
    assert result.exit_code == 2
    assert len(result.stderr.strip().splitlines()) == 1 and "--risk-budget" in result.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site.geojson"]


@pytest.mark.parametrize("site_file", ["ground-yard.geojson", "drone-range.geojson"])
def test_leg_decomposition_sums_to_p_incident_on_every_route_of_the_demo_sites(site_file):
    """Every route a budget plan delivers or checks against, at the demo sites' default cell."""
    from planner.budget_plan import explain_route, plan_budget
    from planner.exact import on_policy_q, optimal_q
    from planner.grid import GridSpec, default_cell_m, rasterise
    from planner.model import Dynamics, build_model
    from planner.route import build_route, nominal_path
    from planner.site import load_site
    from planner.ties import equally_good, incident_from_every_state, safest_among

    eps = 0.1
    site = load_site(MAPS / site_file)
    grid = rasterise(site, GridSpec(default_cell_m(site)))
    model = build_model(grid, Dynamics())
    policies = {name: safest_among(model, equally_good(sol.q), eps, value=sol.q).greedy
                for name, sol in (("shortest", optimal_q(model)), ("cautious", on_policy_q(model, eps)))}
    policies["budget"] = plan_budget(model, eps, BUDGET, tie_m=0.01).greedy
    for name, policy in policies.items():
        path = nominal_path(model, policy)
        record = explain_route(model, grid, build_route(name, path, grid, site, model), path, policy, eps)
        total = incident_from_every_state(model, policy, eps)[model.start]
        assert abs(sum(leg["p_incident"] for leg in record["legs"]) - total) <= 1e-9, name
        assert abs(record["p_incident"] - total) <= 1e-9, name


def test_leg_bars_read_in_the_products_percent_notation(planned):
    """The leg bars' axis prints percentages as the briefing does, with no exponent offset to apply."""
    import matplotlib.pyplot as plt

    from planner.notation import percent
    from planner.plots_budget import figure_causes
    from planner.runload import load_run, rebuild, run_routes

    _, out, _ = planned
    run = load_run(out)
    site, grid, model = rebuild(run)
    routes = run_routes(run, site, grid, model)
    causes = {name: headline(out, name)["causes"] for name in routes}
    # shares of a few in ten thousand: where matplotlib's default axis prints "1e-4" apart
    causes = {name: {**c, "legs": [{**leg, "p_incident": 1e-4 * (k + 1)} for k, leg in enumerate(c["legs"])]}
              for name, c in causes.items()}
    fig = figure_causes(site, grid, routes, causes)
    try:
        fig.canvas.draw()
        bar_axes = [ax for ax in fig.axes if ax.get_xlabel() == "P(incident) from this leg"]
        assert len(bar_axes) == len(routes)
        for ax in bar_axes:
            assert ax.xaxis.get_offset_text().get_text() == ""
            lo, hi = ax.get_xlim()
            shown = [(v, t.get_text()) for v, t in zip(ax.get_xticks(), ax.get_xticklabels(), strict=True)
                     if lo <= v <= hi]
            assert len(shown) >= 2
            assert [text for _, text in shown] == [percent(v) for v, _ in shown]
            assert all(text.endswith("%") for _, text in shown)
    finally:
        plt.close(fig)
