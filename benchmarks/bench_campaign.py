"""A campaign on the demo drone range: 1 against 2 workers, shared grids against none, and separate plan calls.

    python3 benchmarks/bench_campaign.py                  # 40 scenarios (5 pairs x 2 vehicles x 4 drift cases)
    python3 benchmarks/bench_campaign.py --pairs 2 --drifts 2   # 8 scenarios, for a busy machine

Each configuration runs the same campaign into a fresh folder. "separate plan calls"
runs ``veerwise plan`` once per scenario, one process after another (what a shell loop
over ``plan`` does), with each scenario's site file and recorded settings, so the same
work is done. Prints the load average before and after: on a shared machine the
figures are upper bounds.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
#: Start points on the drone range (lon, lat), all inside the boundary west of the hangars.
STARTS = [("pad", '"Launch pad"'), ("south gate", "[-4.1344, 39.8598]"), ("north gate", "[-4.1344, 39.8617]"),
          ("west edge", "[-4.1348, 39.8608]"), ("centre west", "[-4.1338, 39.8604]")]
DRIFTS = [("forecast", 1.0, 0), ("stronger", 1.5, 0), ("veering", 1.0, 25), ("gusty veering", 1.5, 25)]


def campaign_text(n_pairs: int, n_drifts: int, site: Path) -> str:
    lines = [f'site = "{site}"', "seed = 7", "", "[plan]", "cell = 8", "training-runs = 2", "episodes = 20000",
             "max-sweeps = 64", "rollouts = 2000", "table-noises = [0, 0.1]", "table-drifts = [1]", ""]
    for name, start in STARTS[:n_pairs]:
        lines += ["[[pairs]]", f'name = "{name}"', f"start = {start}", 'goal = "Landing circle"', ""]
    lines += ["[[vehicles]]", 'name = "quad"', "move-m = 8", "",
              "[[vehicles]]", 'name = "hexa"', "move-m = 16", "slip = 0.05", ""]
    for name, scale, turn in DRIFTS[:n_drifts]:
        lines += ["[[drifts]]", f'name = "{name}"', f"scale = {scale}", f"bearing-change-deg = {turn}", ""]
    return "\n".join(lines)


def load() -> str:
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


def run_campaign(file: Path, out: Path, n_workers: int, share: bool) -> tuple[float, float]:
    """(seconds including the cluster's start, seconds of the scenarios alone)."""
    from planner.campaign_jobs import make_client, run_jobs
    from planner.cli.campaign_commands import checked_plan

    started = time.perf_counter()
    plan = checked_plan(file)
    client = make_client(n_workers=n_workers)
    try:
        out.mkdir()
        result = run_jobs(client, plan, out, share=share)
    finally:
        cluster = client.cluster
        client.close()
        cluster.close()
    failed = [o for o in result.outcomes if o["status"] != "done"]
    if failed:
        raise SystemExit(f"{len(failed)} scenarios did not run: {failed[0].get('error')}")
    return time.perf_counter() - started, result.elapsed_s


def separate_plans(done: Path, work: Path) -> float:
    """One ``veerwise plan`` process per scenario of the finished campaign in ``done``."""
    import json

    folders = sorted((done / "runs").iterdir())
    started = time.perf_counter()
    for k, folder in enumerate(folders):
        manifest = json.loads((folder / "manifest.json").read_text())
        site = manifest["input"]["site"]
        subprocess.run([sys.executable, "-c", "from planner.cli import cli; cli()", "plan", site, str(work / f"r{k}"),
                        "--settings", str(folder / "manifest.json"), "-q"], check=True, stdout=subprocess.DEVNULL,
                       env={**os.environ, "PYTHONPATH": str(ROOT)})
    return time.perf_counter() - started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--pairs", type=int, default=5)
    parser.add_argument("--drifts", type=int, default=4)
    parser.add_argument("--no-plan-calls", action="store_true", help="skip the separate plan calls")
    parser.add_argument("--no-warm-up", action="store_true", help="the numba cache is warm already")
    args = parser.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="bench-campaign-"))
    try:
        file = tmp / "campaign.toml"
        file.write_text(campaign_text(args.pairs, args.drifts, ROOT / "maps" / "drone-range.geojson"))
        n = args.pairs * 2 * args.drifts
        print(f"{n} scenarios on the drone range; nproc {os.cpu_count()}; load average before: {load()}")
        if not args.no_warm_up:
            run_campaign(file, tmp / "warm", 2, True)  # fills the numba cache; not counted
        rows = []
        for label, workers, share in (("1 worker, shared grids and models", 1, True),
                                      ("2 workers, shared grids and models", 2, True),
                                      ("2 workers, every scenario builds its own grid and model", 2, False)):
            out = tmp / f"out-{workers}-{share}"
            total, scenarios = run_campaign(file, out, workers, share)
            rows.append((label, total, scenarios))
            print(f"{label}: {total:.1f} s in all, {scenarios:.1f} s for the scenarios (load {load()})", flush=True)
        one, two = rows[0][1], rows[1][1]
        print(f"2 workers against 1: {one / two:.2f}x")
        print(f"time saved by sharing grids and models (2 workers): {rows[2][1] - two:+.1f} s")
        if not args.no_plan_calls:
            work = tmp / "plans"
            work.mkdir()
            separate = separate_plans(tmp / "out-2-True", work)
            print(f"{n} separate plan calls: {separate:.1f} s; campaign on 2 workers {separate / two:.2f}x faster "
                  f"(load {load()})")
        print(f"load average after: {load()}")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
