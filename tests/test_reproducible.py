"""The same site, settings and seed give the same run folder; another seed, the same routes.

What may differ between two runs with the same inputs, found by these tests:
``manifest.json`` holds the creation time stamp (``created_utc``) and the wall-clock
durations of each stage (``timings_s``); ``brief.html`` and ``brief.pdf`` print the
creation time stamp, so their bytes (and the manifest's hashes of them) differ too.
Everything else is byte-identical, and with the clock held still so is the briefing.
Runs are compared as users make them, one process each, and against a run made in a
process that has drawn figures before (figures must carry no state between them).
"""

from __future__ import annotations

import csv
import json
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from conftest import small_site_dict
from shapely.geometry import LineString

from planner.cli import cli

MAPS = Path(__file__).resolve().parent.parent / "maps"
#: Files whose bytes must not depend on anything but the inputs.
DATA_FILES = (
    "policies.npz", "training.npz", "risk.json", "risk.csv", "routes-cautious.geojson", "routes-shortest.geojson",
    "waypoints-cautious.csv", "waypoints-shortest.csv", "site.geojson",
    "learning.png", "routes.png", "riskmap.png", "sensitivity.png",
)
#: Manifest entries that record when and how fast, not what.
CLOCK_KEYS = ("created_utc", "timings_s")
#: Small settings on the in-memory test site: a few seconds per run.
SMALL = ["--cell", "2", "--episodes", "2000", "--training-runs", "2", "--rollouts", "300", "--root-seed", "5"]
#: The instant the clock is held at (2026-01-02 03:04:05 UTC), and how the manifest writes it.
FROZEN_INSTANT = 1767323045.0
FROZEN_UTC = "2026-01-02T03:04:05Z"
#: The command line with ``time.gmtime()`` (no argument: "now") held at that instant.
FROZEN_CLOCK_ENTRY = (
    "import time; real = time.gmtime; "
    f"time.gmtime = lambda *args: real(*args) if args else real({FROZEN_INSTANT!r}); "
    "from planner.cli import cli; cli()"
)


def plan(site, out, *options):
    """``plan`` in this process (CliRunner)."""
    Path(out).parent.mkdir(parents=True, exist_ok=True)
    result = CliRunner().invoke(cli, ["plan", str(site), str(out), "-q", *map(str, options)])
    assert result.exit_code == 0, result.output
    return out


def plan_in_fresh_processes(site, runs, *, frozen_clock=True):
    """``plan`` as users run it, one process per (out, options) run, all at once (contention must not matter)."""
    entry = FROZEN_CLOCK_ENTRY if frozen_clock else "from planner.cli import cli; cli()"
    procs = []
    for out, options in runs:
        Path(out).parent.mkdir(parents=True, exist_ok=True)
        procs.append(subprocess.Popen(
            [sys.executable, "-c", entry, "plan", str(site), str(out), "-q", *map(str, options)],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True))
    for proc in procs:
        _, stderr = proc.communicate(timeout=600)
        assert proc.returncode == 0, stderr
    return [out for out, _ in runs]


def manifest(folder) -> dict:
    return json.loads((Path(folder) / "manifest.json").read_text())


def without_clock(m: dict) -> dict:
    m = {k: v for k, v in m.items() if k not in CLOCK_KEYS}
    m["files"] = {k: v for k, v in m["files"].items() if k not in ("brief.html", "brief.pdf")}
    return m


def assert_same_bytes(a: Path, b: Path, names):
    for name in names:
        assert (a / name).read_bytes() == (b / name).read_bytes(), name


@pytest.fixture(scope="module")
def small_same_seed(tmp_path_factory):
    """Two runs on the small test site with the same seed, in fresh processes, clock held still."""
    root = tmp_path_factory.mktemp("small")
    site = root / "site.geojson"
    site.write_text(json.dumps(small_site_dict()))
    # Same folder name in two parents: the briefing prints the folder's name.
    return site, plan_in_fresh_processes(site, [(root / "a" / "run", SMALL), (root / "b" / "run", SMALL)])


def test_same_seed_same_bytes_on_the_small_site(small_same_seed):
    _, (a, b) = small_same_seed
    assert_same_bytes(a, b, DATA_FILES)
    # With the clock held still the briefing is byte-identical too: the time stamp is
    # its only dependence on when it was made.
    assert_same_bytes(a, b, ("brief.html", "brief.pdf"))
    ma, mb = manifest(a), manifest(b)
    assert ma["created_utc"] == mb["created_utc"] == FROZEN_UTC
    assert set(ma["timings_s"]) == set(mb["timings_s"])
    assert {k: v for k, v in ma.items() if k != "timings_s"} == {k: v for k, v in mb.items() if k != "timings_s"}


def test_same_seed_same_bytes_whatever_the_process_drew_before(small_same_seed, tmp_path, monkeypatch):
    from planner.grid import GridSpec, rasterise
    from planner.plots import plot_grid
    from planner.site import load_site

    # The first figure of a fresh process once differed from later ones (global matplotlib
    # state changed after the first figure was created).
    site, (fresh, _) = small_same_seed
    real = time.gmtime
    monkeypatch.setattr(time, "gmtime", lambda *args: real(*args) if args else real(FROZEN_INSTANT))
    # This process has drawn a figure before (as in a notebook, or a batch of runs).
    loaded = load_site(site)
    plot_grid(loaded, rasterise(loaded, GridSpec(cell_m=2.0)), tmp_path / "grid.png")
    here = plan(site, tmp_path / "c" / "run", *SMALL)
    assert_same_bytes(fresh, here, ("learning.png", "routes.png", "riskmap.png", "sensitivity.png",
                                    "brief.html", "brief.pdf"))


@pytest.fixture(scope="module")
def demo_same_seed(tmp_path_factory):
    """Two moderate runs on the ground-robot demo yard with the same seed (not converged)."""
    root = tmp_path_factory.mktemp("same")
    options = ["--root-seed", "7", "--episodes", "20000", "--rollouts", "2000", "--table-noises", "0,0.1",
               "--table-drifts", "1,2"]
    return plan_in_fresh_processes(MAPS / "ground-yard.geojson",
                                   [(root / "a" / "run", options), (root / "b" / "run", options)], frozen_clock=False)


def test_same_seed_same_bytes_on_a_demo_site(demo_same_seed):
    a, b = demo_same_seed
    assert_same_bytes(a, b, DATA_FILES)
    ma, mb = manifest(a), manifest(b)
    assert without_clock(ma) == without_clock(mb)
    assert ma["seeds"]["entropy"] == "7"
    # The briefing differs at most in the time stamp it prints.
    html_a = (a / "brief.html").read_text().replace(ma["created_utc"], "<created>")
    html_b = (b / "brief.html").read_text().replace(mb["created_utc"], "<created>")
    assert html_a == html_b


# ----------------------------------------------------------------------------- another seed


def waypoint_line(folder: Path, policy: str) -> LineString:
    with open(folder / f"waypoints-{policy}.csv") as f:
        rows = list(csv.DictReader(line for line in f if not line.startswith("#")))
    return LineString([(float(r["east_m"]), float(r["north_m"])) for r in rows])


def exact_route_line(folder: Path, policy: str) -> LineString:
    """The nominal route of the exact reference policy (value iteration) of a run."""
    from planner.learn import greedy_actions
    from planner.route import build_route, nominal_path
    from planner.runload import load_run, rebuild

    run = load_run(folder)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        site, grid, model = rebuild(run)
    key = {"cautious": "q_exact_on_policy", "shortest": "q_exact_optimal"}[policy]
    route = build_route(policy, nominal_path(model, greedy_actions(run.arrays[key])), grid, site, model)
    return LineString([(w.east_m, w.north_m) for w in route.waypoints])


@pytest.fixture(scope="module")
def demo_two_seeds(tmp_path_factory):
    """Two converged runs (default episodes) on the ground-robot demo yard with different seeds.

    The risk table is cut to one row per policy: it plays no part in the routes.
    """
    root = tmp_path_factory.mktemp("seeds")
    options = ["--rollouts", "0", "--table-noises", "0.1", "--table-drifts", "1"]
    return plan_in_fresh_processes(MAPS / "ground-yard.geojson",
                                   [(root / f"seed-{seed}", ["--root-seed", seed, *options]) for seed in (1, 3)],
                                   frozen_clock=False)


def test_another_seed_changes_the_learning_curves(demo_two_seeds):
    a, b = demo_two_seeds
    with np.load(a / "training.npz", allow_pickle=False) as ta, np.load(b / "training.npz", allow_pickle=False) as tb:
        assert ta.files == tb.files
        differing = [k for k in ta.files if ta[k].shape != tb[k].shape or not np.array_equal(ta[k], tb[k])]
    # Every learning curve depends on the seed's episodes (the step sizes and bins do not).
    assert any(k.startswith("cautious_") for k in differing) and any(k.startswith("shortest_") for k in differing)
    assert manifest(a)["seeds"]["entropy"] != manifest(b)["seeds"]["entropy"]


@pytest.mark.parametrize("policy", ["cautious", "shortest"])
def test_another_seed_gives_the_same_converged_route(demo_two_seeds, policy):
    a, b = demo_two_seeds
    cell_m = manifest(a)["grid"]["cell_m"]
    for folder in (a, b):
        result = manifest(folder)["results"][policy]
        # The claim is about the delivered route: it reaches the goal for either seed. (The
        # risk verdict is not asserted: at the default training budget the learned cautious
        # policy here is safer and longer than its reference, which the verdict calls not
        # converged.)
        assert result["reached_goal"]
    line_a, line_b = waypoint_line(a, policy), waypoint_line(b, policy)
    # Not byte-identical for every pair of seeds (seeds 1 and 3 pick different cells among
    # near-equal ones), but the same route: within two cells everywhere, the tolerance the
    # convergence report uses for seed agreement, and far below the tens of metres that
    # separate the ways around the yard's hazards.
    assert line_a.hausdorff_distance(line_b) <= 2 * cell_m
    assert abs(line_a.length - line_b.length) <= 2 * cell_m
    # And both are the exact reference's route, to the same tolerance.
    exact = exact_route_line(a, policy)
    assert exact.equals_exact(exact_route_line(b, policy), tolerance=1e-9)
    for line in (line_a, line_b):
        assert line.hausdorff_distance(exact) <= 2 * cell_m
