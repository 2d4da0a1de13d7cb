"""The risk-budget search on a large synthetic yard: wall time, exact solves, peak memory.

A 500 x 500 yard of 1 m cells (250,000 cells, 8 headings, slip 0.1): start south, goal
north, a hazard band across the middle with a narrow gate and a wide way round its east
end, so that the route trades length for risk. ``planner.budget.risk_budget`` is run for
a budget between the gate route's risk and the way round's, at noise 0.1; each exact
solve is warm-started from the previous one.

Usage::

    python3 benchmarks/bench_budget.py [--size N] [--budget P]

``--size 200`` is a quick case for development; the figures quoted are at 500.

Not a test: run by hand (``/usr/bin/time -v`` gives the peak memory), on an otherwise
idle machine for figures worth quoting.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np

import planner.budget as budget
from planner.budget import risk_budget
from planner.grid import FREE, HazardInfo, grid_from_arrays
from planner.model import Dynamics, build_model


def synthetic_model(n: int):
    label = np.full((n, n), FREE, dtype=np.int16)
    band = slice(int(0.48 * n), int(0.52 * n))
    label[band, : int(0.8 * n)] = 0
    gate = slice(int(0.49 * n), int(0.51 * n))
    label[band, gate] = FREE
    goal = np.zeros((n, n), dtype=bool)
    goal[int(0.95 * n), n // 2] = True
    grid = grid_from_arrays(label, goal=goal, start=(int(0.05 * n), n // 2), hazards=(HazardInfo("band"),))
    return build_model(grid, Dynamics(n_actions=8, slip=0.1))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=500)
    parser.add_argument("--budget", type=float, default=1e-3)
    args = parser.parse_args()
    print(f"load average at start {os.getloadavg()[0]:.1f} (1 min), {os.cpu_count()} cores")
    began = time.perf_counter()
    model = synthetic_model(args.size)
    built = time.perf_counter() - began
    phases = {"value iteration": [0.0, 0], "ties by safety": [0.0, 0]}

    def timed(name, function):
        def run(*a, **k):
            t = time.perf_counter()
            out = function(*a, **k)
            phases[name][0] += time.perf_counter() - t
            phases[name][1] += getattr(out, "iterations", getattr(out, "improvements", 0))
            return out
        return run

    budget.on_policy_q = timed("value iteration", budget.on_policy_q)
    budget.safest_among = timed("ties by safety", budget.safest_among)
    began = time.perf_counter()
    answer = risk_budget(model, 0.1, args.budget)
    searched = time.perf_counter() - began
    print(f"{model.n_states:,} cells, {model.n_outcomes:,} outcomes; model {built:.1f} s")
    print(f"budget {args.budget:g}: met {answer.met}, P(incident) {answer.route.p_incident:.3g}, "
          f"length {answer.route.length_m:.1f} m-equiv.; {answer.n_solves} exact solves in {searched:.1f} s "
          f"({searched / max(answer.n_solves, 1):.1f} s per solve)")
    if answer.shorter is not None:
        print(f"  riskier neighbour: P(incident) {answer.shorter.p_incident:.3g}, length "
              f"{answer.shorter.length_m:.1f}; mixing share {answer.mix_share:.3f}")
    print(f"  value iteration {phases['value iteration'][0]:.1f} s ({phases['value iteration'][1]} sweeps), "
          f"ties by safety {phases['ties by safety'][0]:.1f} s ({phases['ties by safety'][1]} improvement rounds)")
    print(f"load average at the end {os.getloadavg()[0]:.1f} (1 min)")


if __name__ == "__main__":
    main()
