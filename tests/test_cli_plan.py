"""``veerwise plan`` as a user runs it, and the commands that read its run folder.

One small plan on the in-memory test site (50 x 30 cells of 2 m, few episodes) is
shared by the module; every test reads it, and tests that change a run folder work on
a copy.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import re
import shutil
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from conftest import plan_small_site, small_site_dict
from numpy.testing import assert_allclose

from planner.cli import cli
from planner.notation import probability_range
from planner.risk import format_prob

#: Small settings: a few seconds in all, not converged (the summary says so).
SMALL = ["--cell", "2", "--episodes", "2000", "--max-sweeps", "4", "--training-runs", "2", "--rollouts", "300",
         "--root-seed", "5"]
#: Every file a run folder holds.
RUN_FILES = {
    "manifest.json", "policies.npz", "training.npz", "routes-cautious.geojson", "routes-shortest.geojson",
    "waypoints-cautious.csv", "waypoints-shortest.csv", "waypoints-cautious.txt", "waypoints-shortest.txt", "risk.csv", "risk.json", "learning.png", "routes.png",
    "riskmap.png", "sensitivity.png", "brief.html", "brief.pdf", "site.geojson",
}
NOTICE = "simulation only - not approved for field operation"
GPX = "{http://www.topografix.com/GPX/1/1}"


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def sha256(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def planned(tmp_path_factory):
    """(site path, run folder, CliRunner result) of one small plan."""
    return plan_small_site(tmp_path_factory.mktemp("plan"), *SMALL)


@pytest.fixture
def run_copy(planned, tmp_path):
    """A private copy of the run folder, for commands that rewrite files in it."""
    copy = tmp_path / "run"
    shutil.copytree(planned[1], copy)
    return copy


def manifest(folder) -> dict:
    return json.loads((Path(folder) / "manifest.json").read_text())


def risk_rows(folder) -> list[dict]:
    return json.loads((Path(folder) / "risk.json").read_text())


# ----------------------------------------------------------------------------- plan


def test_plan_succeeds_and_summarises_both_policies(planned):
    _, out, result = planned
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    text = " ".join(" ".join(lines).split())
    assert text.startswith(f"Test yard: run folder {out} (for simulation and review only)")
    # under 100 columns, but for a line holding a path longer than that (never broken)
    assert all(len(line) < 100 for line in lines if str(out) not in line)
    results = manifest(out)["results"]
    rows = risk_rows(out)
    for name in ("cautious", "shortest"):
        i = next(k for k, line in enumerate(lines) if line.startswith(name))
        match = re.fullmatch(
            rf"{name}\s+(\d+\.\d) m \(\d+\.\d m by waypoints\), (\d+) moves, (reaches the goal|ENDS .+)", lines[i])
        assert match, lines[i]
        # The summary's figures are the manifest's, rounded for display.
        assert_allclose(float(match.group(1)), results[name]["length_m"], atol=0.05)
        assert int(match.group(2)) == results[name]["moves"]
        assert (match.group(3) == "reaches the goal") == results[name]["reached_goal"]
        row = next(r for r in rows if r["policy"] == name and r["noise"] == 0.1 and r["drift_scale"] == 1.0)
        # The risk figure is the risk table's in the one notation, with its range over the
        # training runs: the per-seed figures of the manifest and the exported policy's
        seeds = results[name]["p_incident_seeds"]
        assert len(seeds) == results[name]["n_seeds"] == 2
        lo, hi = min(seeds + [row["p_incident"]]), max(seeds + [row["p_incident"]])
        assert (f"P(incident) {format_prob(row['p_incident'])} at noise 0.1; over the 2 training runs "
                f"{probability_range(lo, hi)}") in text
        # the convergence verdict, as the manifest says it, after what is delivered
        method = {"cautious": "SARSA", "shortest": "Q-learning"}[name]
        assert f"delivered: learned ({method}); {results[name]['message']}" in text
        assert re.match(r"(NOT CONVERGED|converged): ", results[name]["message"])
        # With 2,000 episodes neither learner matches its exact reference.
        assert results[name]["converged"] is False
    assert f"briefing {out / 'brief.html'}" in text
    assert re.search(r"^elapsed\s+\d+\.\d s$", result.stdout, re.M)
    assert "comparison The cautious route is" in text or "comparison In the model" in text


def test_plan_json_and_strict(tmp_path):
    """--json prints the summary's facts as data; --strict exits 3 when not ready to sign."""
    site, out, result = plan_small_site(tmp_path, *SMALL, "--json", "--strict")
    # written whole, then refused for signing: 2,000 episodes do not converge
    assert result.exit_code == 3, result.output
    assert (out / "manifest.json").is_file()
    data = json.loads(result.stdout)
    assert data["ready_to_sign"] is False and data["briefing"] == str(out / "brief.html")
    results = manifest(out)["results"]
    for name in ("cautious", "shortest"):
        assert data["policies"][name]["converged"] is results[name]["converged"]
        assert_allclose(data["policies"][name]["length_m"], results[name]["length_m"], atol=1e-3)
        lo, hi = data["policies"][name]["p_incident_seeds_range"]
        assert lo <= data["policies"][name]["p_incident"] <= hi
    assert data["elapsed_s"] > 0


def test_seeds_disagreement_banner_and_strict_verdict():
    """The banner and --strict follow the seeds' route agreement, not only convergence."""
    from planner.brief_headline import route_figures, seeds_banner

    class Route:
        length_m, reached_goal, end_event = 100.0, True, "goal"

    agree = {"converged": True, "message": "converged", "n_seeds": 8, "seed_routes_matching": 8,
             "p_incident_seeds": [0.001, 0.002]}
    split = dict(agree, seed_routes_matching=3)
    assert not route_figures("cautious", Route(), agree, None)["seeds_disagree"]
    x = route_figures("cautious", Route(), split, None)
    assert x["seeds_disagree"]
    assert seeds_banner(x).startswith("SEEDS DISAGREE on the cautious route: only 3 of 8 training runs")
    # with no risk row the range is the seeds' own: 0.10% to 0.20%
    assert "0.10% to 0.20% (1 in 1,000 to 1 in 500)" in seeds_banner(x)


def test_summary_gives_the_half_cell_figure_beside_the_reported_one(planned):
    _, out, result = planned
    text = " ".join(result.stdout.split())
    for name in ("cautious", "shortest"):
        row = next(r for r in risk_rows(out) if r["policy"] == name and r["noise"] == 0.1 and r["drift_scale"] == 1.0)
        # the same policy re-evaluated at half the cell (1 m), as risk.json records it
        check = row["grid_check"]
        assert check["cell_m"] == 2.0 and check["fine_cell_m"] == 1.0 and check["skipped"] is None
        assert f"at half cell (1 m) {format_prob(check['p_incident_fine'])}" in text
        assert check["flagged"] == (abs(check["p_incident_fine"] - row["p_incident"]) > check["tolerance"])


def test_run_folder_holds_every_file_and_nothing_else(planned):
    site, out, _ = planned
    assert {p.name for p in out.iterdir()} == RUN_FILES
    # No temporary sibling was left beside it.
    assert sorted(p.name for p in out.parent.iterdir()) == ["run", "site.geojson"]
    assert (out / "site.geojson").read_bytes() == site.read_bytes()


def test_manifest_records_inputs_settings_seeds_versions_and_hashes(planned):
    site, out, _ = planned
    m = manifest(out)
    assert m["format"] == "veerwise-run" and m["format_version"] == 1
    assert m["input"]["sha256"] == sha256(site)
    assert m["input"]["site_copy"] == "site.geojson"
    assert m["seeds"]["given"] == 5
    assert int(m["seeds"]["entropy"]) == 5
    s = m["settings"]
    assert s["grid"]["cell_m"] == 2.0
    assert s["learn"]["episodes"] == 2000 and s["learn"]["n_seeds"] == 2
    assert s["rollouts"] == 300 and s["seed"] == 5
    assert s["noises"] == [0.0, 0.05, 0.1, 0.2] and s["drift_scales"] == [1.0, 1.5, 2.0]
    import numba
    import shapely

    assert m["versions"]["numpy"] == np.__version__
    assert m["versions"]["shapely"] == shapely.__version__
    assert m["versions"]["numba"] == numba.__version__
    assert {"python", "veerwise", "scipy", "pyproj", "proj", "matplotlib", "click"} <= set(m["versions"])
    # A hash for every other file, each matching the file's bytes.
    assert set(m["files"]) == RUN_FILES - {"manifest.json"}
    for name, digest in m["files"].items():
        assert sha256(out / name) == digest, name
    assert m["grid"]["rows"] == 30 and m["grid"]["cols"] == 50
    # Both lengths: the drawing's cell and the vehicle's move (the site's default, 1 m,
    # is finer than --cell 2, so a move is one cell).
    assert m["motion"] == {"cell_m": 2.0, "move_m": 2.0, "headings": 8, "budget_moves": None}
    assert s["dynamics"]["move_m"] == 2.0 and s["dynamics"]["n_actions"] == 8 and s["grid_check"] is True
    assert [c["policy"] for c in m["grid_check"]] == ["cautious", "shortest"]


def test_policies_are_plain_arrays_of_the_grid_shape(planned):
    _, out, _ = planned
    with np.load(out / "policies.npz", allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    assert set(arrays) == {"greedy_cautious", "greedy_shortest", "q_cautious", "q_shortest",
                           "q_exact_on_policy", "q_exact_optimal", "greedy_exact_on_policy", "greedy_exact_optimal"}
    for name, arr in arrays.items():
        if name.startswith("greedy"):
            assert arr.dtype == np.int64 and arr.shape == (1500,)
            assert arr.min() >= 0 and arr.max() < 8
        else:
            assert arr.dtype == np.float64 and arr.shape == (1500, 8)
    with np.load(out / "training.npz", allow_pickle=False) as data:
        assert data.files and all(data[k].dtype != object for k in data.files)


def test_waypoint_files_carry_the_simulation_notice(planned):
    _, out, _ = planned
    for name in ("cautious", "shortest"):
        text = (out / f"waypoints-{name}.csv").read_text()
        # the header comes first; the notice is in the 'use' column of every row
        assert text.splitlines()[0].startswith("policy,seq,") and NOTICE in text.splitlines()[1]
        assert (out / f"waypoints-{name}.txt").read_text().lower().startswith(NOTICE)
        geo = json.loads((out / f"routes-{name}.geojson").read_text())
        assert geo["type"] == "FeatureCollection"
        assert geo["use"].startswith(NOTICE)
        assert geo["site"]["sha256"] == manifest(out)["input"]["sha256"]


# ----------------------------------------------------------------------------- risk


def test_risk_reproduces_the_plans_exact_figures(planned):
    _, out, _ = planned
    result = run("risk", out, "--format", "json", "--rollouts", "0")
    assert result.exit_code == 0, result.output
    again = json.loads(result.stdout)
    # Default noise levels and drift scales are the run's: the same 2 x 4 x 3 rows.
    planned_rows = {(r["policy"], r["noise"], r["drift_scale"]): r for r in risk_rows(out)}
    assert len(again) == 24
    for row in again:
        ref = planned_rows[(row["policy"], row["noise"], row["drift_scale"])]
        # Exact absorbing-chain figures, rebuilt from the run folder: the same solve.
        assert_allclose(row["p_incident"], ref["p_incident"], rtol=1e-9, atol=1e-15)
        assert_allclose(row["p_goal"], ref["p_goal"], rtol=1e-9, atol=1e-15)


@pytest.mark.parametrize("fmt", ["text", "csv", "markdown"])
def test_risk_table_formats(planned, fmt):
    _, out, _ = planned
    result = run("risk", out, "--format", fmt, "--rollouts", "0", "--table-noises", "0.1", "--table-drifts", "1,2",
                 "--policy", "cautious")
    assert result.exit_code == 0, result.output
    assert "cautious" in result.stdout and "shortest" not in result.stdout
    if fmt == "csv":
        rows = list(csv.DictReader(result.stdout.splitlines()))
        assert len(rows) == 2


# ----------------------------------------------------------------------------- export


def test_export_csv_and_geojson_match_the_run_folder(planned, tmp_path):
    _, out, _ = planned
    for name in ("cautious", "shortest"):
        target = tmp_path / f"{name}.csv"
        result = run("export", out, "--format", "csv", "--policy", name, "-o", target)
        assert result.exit_code == 0, result.output
        assert "simulation only" in result.stdout
        # Rebuilt from the run folder, the route is the one plan wrote.
        assert target.read_bytes() == (out / f"waypoints-{name}.csv").read_bytes()
        target = tmp_path / f"{name}.geojson"
        assert run("export", out, "--policy", name, "-o", target).exit_code == 0
        assert target.read_bytes() == (out / f"routes-{name}.geojson").read_bytes()


def test_export_csv_both_policies_writes_two_files_with_altitude(planned, tmp_path):
    _, out, _ = planned
    result = run("export", out, "--format", "csv", "--alt-m", "25", "-o", tmp_path / "wp.csv")
    assert result.exit_code == 0, result.output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["wp-cautious.csv", "wp-cautious.txt", "wp-shortest.csv",
                                                          "wp-shortest.txt"]
    for name in ("cautious", "shortest"):
        lines = (tmp_path / f"wp-{name}.csv").read_text().splitlines()
        assert "25.000 m above ground level" in (tmp_path / f"wp-{name}.txt").read_text()
        rows = list(csv.DictReader(lines))
        assert rows and all(r["alt_above_ground_m"] == "25.000" and r["policy"] == name for r in rows)
        assert all(NOTICE in r["use"] and "25.000 m above ground level" in r["use"] for r in rows)


def test_export_gpx_has_both_routes_with_the_notice(planned, tmp_path):
    _, out, _ = planned
    target = tmp_path / "routes.gpx"
    result = run("export", out, "--format", "gpx", "--alt-m", "12.5", "-o", target)
    assert result.exit_code == 0, result.output
    root = ET.parse(target).getroot()
    assert NOTICE in root.find(f"{GPX}metadata/{GPX}desc").text
    routes = root.findall(f"{GPX}rte")
    assert [r.find(f"{GPX}name").text for r in routes] == ["cautious", "shortest"]
    for r in routes:
        name = r.find(f"{GPX}name").text
        points = r.findall(f"{GPX}rtept")
        with open(out / f"waypoints-{name}.csv") as f:
            waypoints = list(csv.DictReader(line for line in f if not line.startswith("#")))
        assert len(points) == len(waypoints)
        for p, w in zip(points, waypoints, strict=True):
            assert_allclose([float(p.get("lon")), float(p.get("lat"))], [float(w["lon"]), float(w["lat"])],
                            atol=1e-9)
            # no ground elevation given: no <ele>; the altitude above ground is in <cmt>
            assert p.find(f"{GPX}ele") is None and p.find(f"{GPX}cmt").text == "12.500 m above ground level"


def test_export_single_policy_geojson(planned, tmp_path):
    _, out, _ = planned
    target = tmp_path / "shortest.geojson"
    assert run("export", out, "--policy", "shortest", "--alt-m", "0", "-o", target).exit_code == 0
    geo = json.loads(target.read_text())
    routes = [f for f in geo["features"] if f["properties"].get("kind") == "route"]
    assert [f["properties"]["policy"] for f in routes] == ["shortest"]
    # An altitude above ground is no height above the ellipsoid (RFC 7946 section 4): a
    # property of its own, and no third coordinate without a ground elevation.
    assert all(len(p) == 2 for p in routes[0]["geometry"]["coordinates"])
    assert routes[0]["properties"]["alt_above_ground_m"] == 0.0


@pytest.mark.parametrize("name, fmt", [("x.csv", "gpx"), ("x.gpx", "geojson"), ("x.geojson", "csv")])
def test_export_refuses_a_format_its_file_name_contradicts(planned, tmp_path, name, fmt):
    _, out, _ = planned
    result = run("export", out, "--format", fmt, "-o", tmp_path / name)
    assert result.exit_code == 2
    assert f"--format {fmt} does not match the extension" in result.stderr
    assert list(tmp_path.iterdir()) == []


def test_export_takes_the_format_from_the_extension(planned, tmp_path):
    _, out, _ = planned
    assert run("export", out, "-o", tmp_path / "r.gpx").exit_code == 0
    assert ET.parse(tmp_path / "r.gpx").getroot().tag == f"{GPX}gpx"
    result = run("export", out, "-o", tmp_path / "r.kml")
    assert result.exit_code == 2 and "the extension .kml names no format" in result.stderr


def test_export_never_overwrites_without_force(planned, tmp_path):
    _, out, _ = planned
    target = tmp_path / "mine.geojson"
    target.write_text("a file someone made")
    result = run("export", out, "--policy", "cautious", "-o", target)
    assert result.exit_code == 2 and "already exists" in result.stderr and "--force" in result.stderr
    assert target.read_text() == "a file someone made"
    # CSV for both policies writes two files: either one already there refuses the export
    (tmp_path / "wp-shortest.csv").write_text("kept")
    result = run("export", out, "-o", tmp_path / "wp.csv")
    assert result.exit_code == 2 and "wp-shortest.csv: already exists" in result.stderr
    assert not (tmp_path / "wp-cautious.csv").exists() and (tmp_path / "wp-shortest.csv").read_text() == "kept"
    assert run("export", out, "--policy", "cautious", "-o", target, "--force").exit_code == 0
    assert target.read_bytes() == (out / "routes-cautious.geojson").read_bytes()


# ----------------------------------------------------------------------------- brief


def test_brief_rewrites_the_briefing_and_keeps_the_folder_loadable(run_copy):
    before = manifest(run_copy)
    result = run("brief", run_copy)
    assert result.exit_code == 0, result.output
    assert "brief.html" in result.stdout and "brief.pdf" in result.stdout
    html = (run_copy / "brief.html").read_text()
    assert "Test yard" in html and "simulation" in html
    assert (run_copy / "brief.pdf").read_bytes()[:5] == b"%PDF-"
    after = manifest(run_copy)
    # Only the briefing's hashes change; the new ones match the new files.
    assert {k: v for k, v in after["files"].items() if not k.startswith("brief.")} == \
        {k: v for k, v in before["files"].items() if not k.startswith("brief.")}
    for name in ("brief.html", "brief.pdf"):
        assert after["files"][name] == sha256(run_copy / name)
    # The folder still passes its own checks.
    assert run("risk", run_copy, "--rollouts", "0", "--table-noises", "0.1", "--table-drifts", "1").exit_code == 0


def test_a_tiny_training_budget_is_not_converged_everywhere_it_is_said(planned):
    # The small settings train far too little: the risk verdict must fail, and say so in the
    # summary, the manifest, risk.json and the briefing (banner and sign-off).
    _, out, result = planned
    results = manifest(out)["results"]
    for name in ("cautious", "shortest"):
        verdict = results[name]["verdict"]
        assert verdict["converged"] is False and results[name]["converged"] is False
        assert results[name]["message"].startswith("NOT CONVERGED")
        assert results[name]["delivered"].endswith("not converged")
        assert verdict["reference_p_incident"] <= verdict["reference_p_incident_max"]
    assert result.stdout.count("NOT CONVERGED") == 2
    records = json.loads((out / "risk.json").read_text())
    assert {r["verdict"] for r in records if r["policy"] in ("cautious", "shortest")} == {"not converged"}
    assert {r["verdict"] for r in records if r["policy"].startswith("exact")} == {"exact reference (ties by safety)"}
    html = (out / "brief.html").read_text()
    assert "learned cautious route must not be signed" in html
    assert "learned shortest route must not be signed" in html


# ----------------------------------------------------------------------------- progress


def test_progress_shows_every_long_stage_and_how_far_it_is(planned, tmp_path, capsys):
    """On a terminal every long stage gets a line that ends at 100%; off one, nothing is drawn."""
    import io

    from rich.console import Console

    from planner.pipeline import compute_plan
    from planner.progress import Progress
    from planner.runfolder import write_run
    from planner.runload import load_run
    from planner.settings import PlanSettings

    site = planned[0]
    settings = load_run(planned[1]).settings
    assert isinstance(settings, PlanSettings)
    screen = io.StringIO()
    with Progress(Console(file=screen, force_terminal=True, width=120, color_system=None)) as progress:
        result = compute_plan(site, settings, progress)
        write_run(result, settings, site, tmp_path / "run", progress=progress)
    # the last frame the display drew, without its cursor movements
    lines = [re.sub(r"\x1b\[[0-?]*[ -/]*[@-~]", "", line) for line in screen.getvalue().splitlines()]
    rows = len(settings.noises) * len(settings.drift_scales) * 4
    for stage in ("building the model", "SARSA (cautious)", "Q-learning (shortest)", "exact references",
                  "risk table (rows)", "figures", "briefing"):
        drawn = [line for line in lines if stage in line and line.startswith("[")]
        assert drawn and "100%" in drawn[-1], (stage, lines[-12:])
    assert any(f"risk table: 4 policies x {len(settings.noises)} noise levels" in line for line in lines)
    assert rows == len(result.risk_rows)
    # without a console the same calls draw nothing
    capsys.readouterr()
    quiet = Progress()
    with quiet, quiet.task("anything", 3) as report:
        report(1)
        quiet("a note")
    assert capsys.readouterr() == ("", "")


@pytest.mark.parametrize("args, message", [
    (["--move-m", "1.5"], "--move-m 1.5 m is shorter than the cell (2 m)"),
    (["--headings", "6"], "--headings must be 4, 8 or 16, got 6"),
    (["--crs", "EPSG:4326"], "--crs 'EPSG:4326': is not a projected CRS (a geographic CRS is in degrees"),
    (["--budget-m", "1"], "--budget-m 1 m is shorter than one move (2 m)"),
    (["--moves", "8"], "No such option '--moves'"),
    (["--budget-min", "5"], "--budget-min needs --speed-mps"),
    (["--budget-m", "100", "--budget-min", "5", "--speed-mps", "2"], "give the travel budget once"),
    (["--speed-mps", "2"], "--speed-mps is the speed a time budget (--budget-min) is travelled at"),
    (["--table-noises", "0,0.2"], "--table-noises must include the planning noise --epsilon 0.1"),
    (["--plan-drift", "1.5", "--table-drifts", "1,2"], "--table-drifts must include the planning drift --plan-drift 1.5"),
])
def test_bad_vehicle_settings_are_one_line_exit_2_nothing_written(tmp_path, args, message):
    site, out, result = plan_small_site(tmp_path, *SMALL, *args)
    assert result.exit_code == 2, result.output
    assert len(result.output.strip().splitlines()) == 1, result.output
    assert message in result.output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site.geojson"]


def test_a_per_move_drift_property_is_refused_naming_its_replacement(tmp_path):
    site = tmp_path / "old.geojson"
    data = small_site_dict()
    props = data["features"][4]["properties"]
    del props["drift_per_m"]
    props["push_m"] = 3.0
    site.write_text(json.dumps(data))
    out = tmp_path / "run"
    result = CliRunner().invoke(cli, ["plan", str(site), str(out), *SMALL])
    assert result.exit_code == 2 and len(result.output.strip().splitlines()) == 1, result.output
    assert "property 'push_m' (per move) is from site schema 1 and was replaced by 'drift_per_m'" in result.output
    assert not out.exists()


def test_no_grid_check_says_it_was_switched_off(tmp_path):
    _, out, result = plan_small_site(tmp_path, *SMALL, "--no-grid-check", "--rollouts", "0")
    assert result.exit_code == 0, result.output
    assert result.output.count("half-cell check skipped: switched off (--no-grid-check)") == 2
    assert all(c["skipped"] == "switched off (--no-grid-check)" for c in manifest(out)["grid_check"])


def test_briefing_gives_the_half_cell_figure_beside_the_reported_one(planned):
    _, out, _ = planned
    html = (out / "brief.html").read_text()
    assert "the same policy re-evaluated at half the cell size" in html
    for record in risk_rows(out):
        check = record.get("grid_check")
        if check:
            assert format_prob(check["p_incident_fine"]) in html and f"at {check['fine_cell_m']:g} m cells" in html
    assert "move length 2 m between heading decisions" in html


def test_a_time_budget_is_minutes_at_the_stated_speed_shown_in_metres(planned):
    # 0.5 min at 2 m/s is 60 m of travel: 30 moves of the small site's 2 m.
    _, out, _ = planned
    result = CliRunner().invoke(cli, ["risk", str(out), "--budget-min", "0.5", "--speed-mps", "2", "--details",
                                      "--rollouts", "0", "--table-noises", "0.1", "--table-drifts", "1"])
    assert result.exit_code == 0, result.output
    assert result.output.count("within 60.0 m (30 moves of 2 m): goal") == 2, result.output
    no_speed = CliRunner().invoke(cli, ["risk", str(out), "--budget-min", "0.5"])
    assert no_speed.exit_code == 2 and len(no_speed.output.strip().splitlines()) == 1, no_speed.output
    assert "--budget-min needs --speed-mps" in no_speed.output


def test_three_grid_levels_give_the_quarter_cell_figure_and_the_observed_order(tmp_path):
    _, out, result = plan_small_site(tmp_path, *SMALL, "--grid-levels", "3")
    assert result.exit_code == 0, result.output
    checks = manifest(out)["grid_check"]
    assert [c["quarter_cell_m"] for c in checks] == [0.5, 0.5]
    html = (out / "brief.html").read_text()
    for c in checks:
        f3, f2, f1 = c["p_incident"], c["p_incident_fine"], c["p_incident_quarter"]
        assert f1 is not None and 0.0 <= f1 <= 1.0
        # Roache (1998), grid refinement ratio 2: p = ln((f3 - f2) / (f2 - f1)) / ln 2, only for
        # monotone convergence (differences of one sign, shrinking).
        if (f2 - f3) * (f1 - f2) > 0 and abs(f1 - f2) < abs(f2 - f3):
            order = math.log((f3 - f2) / (f2 - f1)) / math.log(2.0)
            assert c["order"] == pytest.approx(order, rel=1e-9)
            assert c["extrapolated"] == pytest.approx(f1 + (f1 - f2) / (2.0**order - 1.0), rel=1e-9)
            assert "observed order" in result.output
        else:
            assert c["order"] is None and "do not converge monotonically" in result.output
        assert format_prob(f1) in html and "at quarter cell (0.5 m)" in html
