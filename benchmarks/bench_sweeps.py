"""The sweeps-schedule TD loop against a C loop of the same update, side by side.

Builds a synthetic 200 x 200 yard of 1 m cells (8 headings, slip 0.1, a hazard band
with a gate), packs its outcome table for the learners, and runs
``planner.learn_kernels.run_sweeps`` (numba) and ``benchmarks/sweep_reference.c`` (compiled
here with the machine's C compiler at -O2) on the same table, the same sweep order, the
same initial Q and the same splitmix64 seed, alternately, several times each. Both must
give the same Q table bit for bit (same arithmetic in the same order); the figure quoted
is the ratio of their update rates (median over trials).

Usage::

    python3 benchmarks/bench_sweeps.py [--sweeps N] [--trials N] [--method sarsa|qlearning]

Not a test: run by hand, on an otherwise idle machine for figures worth quoting. Without
a C compiler the C side is skipped with a note.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import tempfile
import time
from pathlib import Path

import numpy as np

from planner.grid import FREE, HazardInfo, grid_from_arrays
from planner.learn import METHODS, SARSA_SWEEP_HORIZON, SWEEP_DECAY
from planner.learn_kernels import rates, run_sweeps, sampling_inputs
from planner.learn_paths import heuristic_q, model_cost_to_go, sweep_order
from planner.model import Dynamics, build_model

HERE = Path(__file__).resolve().parent


def synthetic_model(n: int = 200):
    """Start south, goal north, a hazard band across the middle with a 10-cell gate."""
    label = np.full((n, n), FREE, dtype=np.int16)
    label[95:105, 20:180] = 0
    label[95:105, 95:105] = FREE
    goal = np.zeros((n, n), dtype=bool)
    goal[190, 100] = True
    grid = grid_from_arrays(label, goal=goal, start=(10, 100), hazards=(HazardInfo("band"),))
    return build_model(grid, Dynamics(n_actions=8, slip=0.1))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sweeps", type=int, default=20)
    parser.add_argument("--trials", type=int, default=5)
    parser.add_argument("--method", choices=sorted(METHODS), default="qlearning")
    parser.add_argument("--horizon", type=float, default=None,
                        help="step H / (H + n - 1) in sweep n (default: SARSA's as plan trains it, none for Q-learning)")
    args = parser.parse_args()

    model = synthetic_model()
    to_go = model_cost_to_go(model)
    order = sweep_order(model, to_go)
    sampling = sampling_inputs(model)
    table = sampling.records
    q0 = heuristic_q(model, to_go).reshape(-1)
    method, eps, seed = METHODS[args.method], 0.1, 20261203
    horizon = args.horizon if args.horizon is not None else (SARSA_SWEEP_HORIZON if args.method == "sarsa" else 0.0)
    print(f"{model.n_states:,} states, {order.size:,} pairs per sweep, {model.n_outcomes:,} outcomes; "
          f"{args.method}, {args.sweeps} sweeps per trial")

    def numba_run():
        q = q0.copy()
        began = time.perf_counter()
        run_sweeps(sampling, rates(method, eps, 1.0, decay=SWEEP_DECAY, horizon=horizon), order, q,
                   np.array([seed], np.uint64), 0, args.sweeps)
        return time.perf_counter() - began, q

    numba_run()  # compile (or load the cache) outside the timing
    cc = shutil.which("cc") or shutil.which("gcc")
    with tempfile.TemporaryDirectory(prefix="veerwise-sweeps-") as tmp:
        tmp = Path(tmp)
        exe = tmp / "sweep_reference"
        if cc:
            subprocess.run([cc, "-O2", "-o", str(exe), str(HERE / "sweep_reference.c"), "-lm"], check=True)
            model.offsets.astype(np.int64).tofile(tmp / "offsets.bin")
            table.tofile(tmp / "table.bin")
            order.astype(np.int64).tofile(tmp / "order.bin")
            np.array([model.n_actions], np.int64).tofile(tmp / "meta.bin")
        else:
            print("no C compiler on this machine: the C side is skipped")

        def c_run():
            q0.tofile(tmp / "q.bin")
            out = subprocess.run([str(exe), str(tmp), str(args.sweeps), str(method), repr(eps), repr(SWEEP_DECAY),
                                  repr(horizon), str(seed)], check=True, capture_output=True, text=True)
            return float(out.stdout.strip()), np.fromfile(tmp / "q.bin", dtype=np.float64)

        updates = args.sweeps * order.size
        rows = []
        for _ in range(args.trials):
            t_numba, q_numba = numba_run()
            if cc:
                t_c, q_c = c_run()
                same = bool(np.array_equal(q_numba, q_c))
                rows.append((t_numba, t_c, same))
            else:
                rows.append((t_numba, float("nan"), None))
    t_numba = np.array([r[0] for r in rows])
    print(f"numba: median {np.median(t_numba):.3f} s, {updates / np.median(t_numba) / 1e6:.1f} M updates/s")
    if cc:
        t_c = np.array([r[1] for r in rows])
        ratio = t_c / t_numba
        print(f"C -O2: median {np.median(t_c):.3f} s, {updates / np.median(t_c) / 1e6:.1f} M updates/s")
        print(f"numba rate / C rate: median {np.median(ratio):.3f} (min {ratio.min():.3f}, max {ratio.max():.3f}); "
              f"same Q bit for bit in {sum(r[2] for r in rows)} of {len(rows)} trials")


if __name__ == "__main__":
    main()
