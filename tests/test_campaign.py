"""``veerwise campaign``: many plans at once, each equal to the same plan run on its own."""

from __future__ import annotations

import csv
import json
import os
import shutil
import subprocess
import sys
import time
from html import unescape
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from conftest import point, small_site_dict

from planner.cli import cli

#: Small plan settings (a few seconds of computing per scenario; not converged, and said so).
PLAN = """
[plan]
cell = 2
episodes = 2000
max-sweeps = 4
training-runs = 2
rollouts = 300
table-noises = [0.1]
table-drifts = [1]
"""
#: Two pairs (one by the site's feature names, one by lon/lat), one vehicle, three drift cases.
PAIRS = f"""
[[pairs]]
name = "west-east"
start = "Launch"
goal = "Target"

[[pairs]]
name = "diagonal"
start = {point(10, 10)}
goal = {point(90, 50)}
"""
AXES = """
[[vehicles]]
name = "rover"
slip = 0.05

[[drifts]]
name = "calm"
scale = 0.5

[[drifts]]
name = "forecast"
scale = 1.0

[[drifts]]
name = "turned"
scale = 1.0
bearing-change-deg = 30
"""
#: Columns that say where and when, not what: they may differ between two runs of one campaign.
CLOCK_COLUMNS = ("elapsed_s", "run_id")


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def write_campaign(folder: Path, body: str, *, head: str = 'site = "site.geojson"\nseed = 11\nrisk-limit = 0.001\n',
                   name: str = "day.toml") -> Path:
    (folder / "site.geojson").write_text(json.dumps(small_site_dict()))
    path = folder / name
    path.write_text(head + body)
    return path


def table(folder: Path) -> list[dict]:
    with open(folder / "campaign.csv", newline="") as f:
        return list(csv.DictReader(f))


def without_clock(rows):
    return [{k: v for k, v in r.items() if k not in CLOCK_COLUMNS} for r in rows]


@pytest.fixture(scope="module")
def campaigned(tmp_path_factory):
    """(campaign file, output folder, CliRunner result) of the 6-scenario campaign on 2 local workers."""
    root = tmp_path_factory.mktemp("campaign")
    path = write_campaign(root, PLAN + PAIRS + AXES)
    out = root / "out"
    result = run("campaign", path, "--out", out, "--workers", 2)
    return path, out, result


def test_campaign_runs_every_scenario_and_writes_one_table(campaigned):
    path, out, result = campaigned
    assert result.exit_code == 0, result.output
    assert "6 scenarios: 6 run, 0 already finished (skipped), 0 failed; 2 workers" in result.output
    rows = table(out)
    assert len(rows) == 12  # 6 scenarios x 2 routes
    assert {r["route"] for r in rows} == {"cautious", "shortest"}
    assert {r["status"] for r in rows} == {"done"}
    assert len({r["run_folder"] for r in rows}) == 6
    record = json.loads((out / "campaign.json").read_text())
    assert record["counts"] == {"done": 6, "skipped": 0, "failed": 0}
    assert "simulation and review only" in record["notice"]
    html = unescape((out / "campaign.html").read_text())
    assert "site's safety rules, certified operators and local regulations" in html
    assert (out / "campaign.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the briefing lists the routes above the risk limit (0.1%) before the others
    above = [r["scenario"] for r in rows if r["above_risk_limit"] == "true"]
    assert above, "the small yard's shortest routes are above 0.1%"
    first_below = html.index("Within the risk limit")
    for r in rows:
        if r["above_risk_limit"] == "true":
            assert html.index(f"{r['run_folder']}/brief.html") < first_below


def test_every_figure_equals_the_same_scenario_planned_on_its_own(campaigned, tmp_path):
    """Each scenario's run folder equals `plan` of the same site, options and seed, run alone."""
    _, out, result = campaigned
    assert result.exit_code == 0, result.output
    rows = [r for r in table(out) if r["route"] == "cautious"]
    scales = {"calm": 0.5, "forecast": 1.0, "turned": 1.0}
    for k, row in enumerate(rows):
        folder = out / row["run_folder"]
        site = folder / "site.geojson"
        features = {f["properties"]["role"]: f for f in json.loads(site.read_text())["features"]}
        # the pair's start and goal, as the campaign file gives them (the site's own or lon/lat)
        if row["pair"] == "diagonal":
            np.testing.assert_allclose(features["start"]["geometry"]["coordinates"], point(10, 10), atol=1e-12)
            np.testing.assert_allclose(features["goal"]["geometry"]["coordinates"], point(90, 50), atol=1e-12)
        else:
            np.testing.assert_allclose(features["start"]["geometry"]["coordinates"], point(10, 30), atol=1e-12)
        drift = next(f for f in json.loads(site.read_text())["features"] if f["properties"]["role"] == "drift")
        assert drift["properties"]["toward_deg"] == (210.0 if row["drift_case"] == "turned" else 180.0)
        scale = scales[row["drift_case"]]
        alone = tmp_path / f"alone-{k}"
        drifts = "1" if scale == 1.0 else f"1,{scale}"
        planned = run("plan", site, alone, "--cell", 2, "--episodes", 2000, "--max-sweeps", 4, "--training-runs", 2,
                      "--rollouts", 300, "--table-noises", "0.1", "--table-drifts", drifts, "--slip", 0.05,
                      "--plan-drift", scale, "--root-seed", row["root_seed"], "-q")
        assert planned.exit_code == 0, planned.output
        assert (alone / "risk.json").read_bytes() == (folder / "risk.json").read_bytes(), row["scenario"]
        with np.load(alone / "policies.npz") as a, np.load(folder / "policies.npz") as b:
            assert sorted(a.files) == sorted(b.files)
            for name in a.files:
                np.testing.assert_array_equal(a[name], b[name])
        mine = json.loads((folder / "manifest.json").read_text())
        theirs = json.loads((alone / "manifest.json").read_text())
        assert mine["results"] == theirs["results"]
        # and the campaign's table reads the same figure
        risk = json.loads((alone / "risk.json").read_text())
        p = next(r["p_incident"] for r in risk if r["policy"] == "cautious" and r["noise"] == 0.1
                 and r["drift_scale"] == scale)
        assert float(row["p_incident"]) == p


@pytest.fixture
def dask_cluster(tmp_path):
    """A Dask scheduler and two workers, each its own local process; yields the scheduler's address."""
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(Path(__file__).parents[1]), os.environ.get(
        "PYTHONPATH", "")])}
    file = tmp_path / "scheduler.json"
    dask = [sys.executable, "-m", "distributed.cli.dask_scheduler"]
    procs = [subprocess.Popen([*dask, "--scheduler-file", str(file), "--port", "0", "--no-dashboard",
                               "--host", "127.0.0.1"], env=env, stdout=subprocess.DEVNULL,
                              stderr=subprocess.DEVNULL)]
    try:
        deadline = time.monotonic() + 60
        while not file.exists() and time.monotonic() < deadline:
            time.sleep(0.2)
        time.sleep(0.5)
        address = json.loads(file.read_text())["address"]
        for _ in range(2):
            procs.append(subprocess.Popen(
                [sys.executable, "-m", "distributed.cli.dask_worker", address, "--nthreads", "1", "--nworkers", "1",
                 "--no-dashboard"], env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        from distributed import Client

        with Client(address, timeout="30s") as client:
            client.wait_for_workers(2, timeout=60)
        yield address
    finally:
        for p in reversed(procs):
            p.terminate()
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                p.kill()


def test_the_same_campaign_on_a_running_scheduler_gives_the_same_table(campaigned, dask_cluster, tmp_path):
    path, out, result = campaigned
    assert result.exit_code == 0, result.output
    remote = tmp_path / "remote"
    again = run("campaign", path, "--out", remote, "--scheduler", dask_cluster)
    assert again.exit_code == 0, again.output
    assert "6 run, 0 already finished (skipped), 0 failed; 2 workers" in again.output
    assert without_clock(table(remote)) == without_clock(table(out))


def test_a_rerun_skips_finished_scenarios_reruns_missing_ones_and_reports_a_failure(campaigned, tmp_path):
    path, out, result = campaigned
    assert result.exit_code == 0, result.output
    copy = tmp_path / "out"
    shutil.copytree(out, copy)
    before = table(copy)
    folders = sorted({r["run_folder"] for r in before})
    shutil.rmtree(copy / folders[0])  # lost: must be made again
    shutil.rmtree(copy / folders[1])
    (copy / folders[1]).mkdir()
    (copy / folders[1] / "notes.txt").write_text("a user's file, not a run")  # blocks this scenario
    again = run("campaign", path, "--out", copy, "--workers", 1)
    assert again.exit_code == 4, again.output
    assert "6 scenarios: 1 run, 4 already finished (skipped), 1 failed" in again.output
    failed_line = next(line for line in again.output.splitlines() if "FAILED" in line)
    assert "is not a veerwise run folder" in failed_line
    assert (copy / folders[1] / "notes.txt").read_text() == "a user's file, not a run"
    after = table(copy)
    statuses = {r["run_folder"]: r["status"] for r in after}
    failed = next(r for r in after if r["status"] == "failed")
    assert "is not a veerwise run folder" in failed["error"] and not failed["run_folder"]
    assert statuses[folders[0]] == "done"
    assert sum(s == "skipped" for s in statuses.values()) == 4
    # the scenario made again has the same figures as before: same seed, same results
    kept = [{k: v for k, v in r.items() if k not in (*CLOCK_COLUMNS, "status")} for r in after
            if r["run_folder"] == folders[0]]
    first = [{k: v for k, v in r.items() if k not in (*CLOCK_COLUMNS, "status")} for r in before
             if r["run_folder"] == folders[0]]
    assert kept == first


def test_seeds_do_not_depend_on_the_order_of_the_scenarios(tmp_path):
    from planner.cli.campaign_commands import checked_plan

    listed = PLAN + PAIRS + AXES + "".join(
        f'\n[[scenarios]]\npair = "{p}"\nvehicle = "rover"\ndrift = "{d}"\n'
        for p, d in (("diagonal", "turned"), ("west-east", "calm"), ("diagonal", "calm")))
    head = 'site = "site.geojson"\nseed = 11\nexpand = "list"\n'
    product = {j.scenario.name: j.seed for j in checked_plan(write_campaign(tmp_path, PLAN + PAIRS + AXES)).jobs}
    chosen = {j.scenario.name: j.seed for j in checked_plan(write_campaign(tmp_path, listed, head=head,
                                                                           name="list.toml")).jobs}
    assert list(chosen) == ["diagonal / rover / turned", "west-east / rover / calm", "diagonal / rover / calm"]
    assert all(chosen[name] == product[name] for name in chosen)
    assert len(set(product.values())) == 6
    other = {j.scenario.name: j.seed for j in checked_plan(write_campaign(
        tmp_path, PLAN + PAIRS + AXES, head='site = "site.geojson"\nseed = 12\n', name="other.toml")).jobs}
    assert not set(other.values()) & set(product.values())


@pytest.mark.parametrize(("body", "message"), [
    (PLAN + PAIRS + AXES + "\nwind = 3\n", "unknown key 'wind'"),
    (PLAN + PAIRS + AXES.replace("slip = 0.05", "slip = 0.05\ngust = 1"), "vehicles[0]: unknown key 'gust'"),
    (PLAN + PAIRS, "vehicles is empty"),
    (PLAN + PAIRS + AXES.replace("slip = 0.05", "slip = 1.5"),
     "vehicle 'rover' slip must be a number in [0, 1], got 1.5"),
    (PLAN + PAIRS.replace(str(point(10, 10)), str(point(-30, 10))) + AXES,
     "scenario 'diagonal / rover / calm'"),
    (PLAN + PAIRS.replace('"Launch"', '"Nowhere"') + AXES, "pair 'west-east' start: the site has no feature"),
])
def test_bad_campaign_files_are_one_line_exit_2_nothing_written(tmp_path, no_heavy_work, body, message):
    path = write_campaign(tmp_path, body)
    out = tmp_path / "out"
    result = run("campaign", path, "--out", out)
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("veerwise: error: ") and message in lines[0], result.output
    assert "Traceback" not in result.output
    assert not out.exists()


def test_a_start_outside_the_boundary_names_the_scenario_and_the_rule(tmp_path, no_heavy_work):
    path = write_campaign(tmp_path, PLAN + PAIRS.replace(str(point(10, 10)), str(point(-30, 10))) + AXES)
    result = run("campaign", path, "--out", tmp_path / "out")
    assert result.exit_code == 2
    assert "start lies outside the boundary" in result.output


def test_an_unreachable_scheduler_is_one_line_exit_2_nothing_written(tmp_path, no_heavy_work):
    path = write_campaign(tmp_path, PLAN + PAIRS + AXES)
    out = tmp_path / "out"
    result = run("campaign", path, "--out", out, "--scheduler", "tcp://127.0.0.1:9")
    assert result.exit_code == 2, result.output
    error = [line for line in result.output.splitlines() if line.startswith("veerwise: error: ")]
    assert len(error) == 1 and "--scheduler tcp://127.0.0.1:9: cannot reach a Dask scheduler" in error[0]
    assert not out.exists()


def test_the_example_campaign_checks_and_expands_to_eight_scenarios(tmp_path, no_heavy_work):
    example = Path(__file__).parents[1] / "examples" / "drone-day.toml"
    out = tmp_path / "day"
    result = run("campaign", example, "--out", out, "--check")
    assert result.exit_code == 0, result.output
    assert "8 scenarios (2 pairs x 2 vehicles x 2 drift cases)" in result.output
    assert not out.exists()


def test_pairs_with_one_target_share_one_model_and_plan_as_if_on_their_own(tmp_path):
    """Two launch points to one target, one vehicle and drift case: one model, the plans unchanged."""
    from planner.campaign_jobs import grid_key, model_key
    from planner.cli.campaign_commands import checked_plan
    from planner.pipeline import compute_plan, shared_model

    pairs = PAIRS.replace(f"goal = {point(90, 50)}", 'goal = "Target"')
    plan = checked_plan(write_campaign(tmp_path, PLAN + pairs + AXES))
    jobs = {j.scenario.name: j for j in plan.jobs}

    def grid_and_key(name):
        job = jobs[name]
        grid = plan.prepared[grid_key(job.site_key, job.settings)].grid
        return job, grid, model_key(grid, job.settings)

    first, grid_a, key_a = grid_and_key("west-east / rover / forecast")
    second, grid_b, key_b = grid_and_key("diagonal / rover / forecast")
    assert grid_a.start != grid_b.start and key_a == key_b
    # another drift scale, another drift bearing: other models
    assert grid_and_key("diagonal / rover / calm")[2] != key_b
    assert grid_and_key("diagonal / rover / turned")[2] != key_b

    prepared = plan.prepared[grid_key(second.site_key, second.settings)]
    alone = compute_plan("site.geojson", second.settings, site=prepared.site, grid=prepared.grid)
    together = compute_plan("site.geojson", second.settings, site=prepared.site, grid=prepared.grid,
                            shared=shared_model(grid_a, first.settings))
    assert together.model.start == grid_b.start_index
    for name in ("cautious", "shortest"):
        np.testing.assert_array_equal(together.exact[name].q, alone.exact[name].q)
        np.testing.assert_array_equal(together.greedy[name], alone.greedy[name])
    assert [r.p_incident for r in together.risk_rows] == [r.p_incident for r in alone.risk_rows]
