"""Benchmark: one exact risk solve on synthetic grids from 10k to 250k cells.

Run by hand (not part of the test suite)::

    python benchmarks/bench_risk.py                  # 100, 200, 350, 500 cells a side
    python benchmarks/bench_risk.py --sizes 500      # just the 250,000-cell target

Each size runs in its own process so that its peak resident memory (``ru_maxrss``)
is its own. The grid is square with 8 moves, slip 0.1, three hazards that end the
run, walls at the edges, and drift in east-west bands (every other band of 25 rows,
pushing east-south-east with spread); the policy is the deterministic shortest-path
policy executed with noise 0.1. Reported: model building time; the time of one exact
evaluation (:func:`planner.risk.evaluate`: the chain, reachability, the absorption
solve for every cell and the conditional-on-success solve); the extra time each zone
that does not end the run would add (one more chain and solve, for P(entry)); the
largest residual; and the peak resident memory of the whole process (model included).
"""

from __future__ import annotations

import argparse
import json
import math
import resource
import subprocess
import sys
import time

import numpy as np

TARGET_S = 10.0
TARGET_BYTES = 2 * 2**30


def synthetic_grid(n: int):
    """An ``n`` x ``n`` yard of 1 m cells: three hazards and drift bands."""
    from planner.grid import FREE, DriftInfo, HazardInfo, grid_from_arrays

    label = np.full((n, n), FREE, dtype=np.int16)
    label[n // 3:n // 3 + n // 10, n // 4:n // 2] = 0
    label[2 * n // 3:2 * n // 3 + n // 10, n // 2:3 * n // 4] = 1
    label[n // 6:n // 6 + n // 20, n // 2:n - n // 8] = 2
    goal = np.zeros((n, n), dtype=bool)
    goal[n - 3, n - 3] = True
    drift_class = np.zeros((n, n), dtype=np.int32)
    drift_class[(np.arange(n) // 25) % 2 == 1, :] = 1
    hazards = (HazardInfo("North pond"), HazardInfo("Mast"), HazardInfo("Gravel pit"))
    drifts = (DriftInfo("Gust band", ratio=0.5, toward_deg=math.degrees(math.atan2(0.4, -0.3)), spread=0.5,
                        chance=1.0),)
    return grid_from_arrays(label, goal=goal, start=(2, 2), cell_m=1.0, hazards=hazards, drifts=drifts,
                            drift_class=drift_class, drift_members=((), (0,)))


def shortest_policy(grid, n_actions: int = 8) -> np.ndarray:
    """Greedy actions of the deterministic cheapest route to the goal (Dijkstra costs)."""
    from planner.grid import cost_to_goal
    from planner.motion import moves_for

    cost = cost_to_goal(grid, n_actions)
    n_rows, n_cols = grid.shape
    rows, cols = np.indices(grid.shape)
    best = np.full(grid.n_cells, np.inf)
    action = np.zeros(grid.n_cells, dtype=np.int64)
    for a, (dr, dc) in enumerate(moves_for(n_actions)):
        r1, c1 = rows + dr, cols + dc
        inside = (r1 >= 0) & (r1 < n_rows) & (c1 >= 0) & (c1 < n_cols)
        nxt = np.where(inside, np.ravel_multi_index((np.clip(r1, 0, n_rows - 1), np.clip(c1, 0, n_cols - 1)),
                                                    grid.shape), 0)
        value = np.where(inside, cost[nxt] + math.hypot(dr, dc) * grid.cell_m, np.inf).ravel()
        better = value < best
        best[better] = value[better]
        action[better] = a
    return action


def peak_bytes() -> int:
    """Peak resident memory of this process so far (Linux reports KiB)."""
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024


def run_one(n: int) -> dict:
    from planner.model import Dynamics, build_model, epsilon_greedy
    from planner.risk import absorption, evaluate

    grid = synthetic_grid(n)
    policy = shortest_policy(grid)
    dynamics = Dynamics(n_actions=8, slip=0.1, edge="wall", hazard_penalty_m=10.0 * n * n)
    # A tiny build first, so numba's cache load is not counted as building time.
    build_model(synthetic_grid(30), dynamics)
    t0 = time.perf_counter()
    model = build_model(grid, dynamics)
    t_build = time.perf_counter() - t0
    rss_model = peak_bytes()
    t0 = time.perf_counter()
    row = evaluate(model, policy, noise=0.1, name="shortest", hazards=grid.hazards)
    t_eval = time.perf_counter() - t0
    peak_eval = peak_bytes()
    # What one zone that does not end the run adds: its own chain and solve.
    t0 = time.perf_counter()
    absorption(model, epsilon_greedy(policy, model.n_actions, 0.1), absorb_crossing=0)
    t_entry = time.perf_counter() - t0
    return {
        "side": n, "cells": n * n, "outcomes": model.n_outcomes, "model_mib": model.nbytes / 2**20,
        "build_s": t_build, "evaluate_s": t_eval, "peak_after_build_mib": rss_model / 2**20,
        "entry_s": t_entry, "peak_mib": peak_eval / 2**20, "peak_with_entry_mib": peak_bytes() / 2**20,
        "residual": row.residual, "p_goal": row.p_goal, "p_incident": row.p_incident,
        "expected_moves": row.expected_moves,
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[100, 200, 350, 500], help="cells a side")
    parser.add_argument("--child", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child is not None:
        print(json.dumps(run_one(args.child)))
        return 0
    print(f"{'cells':>8} {'outcomes':>10} {'model MiB':>9} {'build s':>8} {'solve s':>8} {'peak MiB':>9} "
          f"{'+entry s':>8} {'residual':>9}  P(goal)  P(incident)")
    ok = True
    for n in args.sizes:
        out = subprocess.run([sys.executable, __file__, "--child", str(n)], capture_output=True, text=True,
                             check=True)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"{r['cells']:>8,} {r['outcomes']:>10,} {r['model_mib']:>9.0f} {r['build_s']:>8.2f} "
              f"{r['evaluate_s']:>8.2f} {r['peak_mib']:>9.0f} {r['entry_s']:>8.2f} {r['residual']:>9.1e}  "
              f"{r['p_goal']:.4f}  "
              f"{r['p_incident']:.3e}")
        if n == 500:
            ok = r["evaluate_s"] < TARGET_S and r["peak_mib"] * 2**20 < TARGET_BYTES
    if 500 in args.sizes:
        print(f"target (500 x 500: solve < {TARGET_S:.0f} s, peak < 2 GiB): {'met' if ok else 'MISSED'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
