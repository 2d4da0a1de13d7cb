"""Learning throughput: environment steps per second on one core.

Runs the numba learning kernels (``planner.learn_kernels``, through ``planner.learn.train``) and, side by side in the same
run, a plain-Python loop of the same update (epsilon-greedy with random tie-breaking,
the same cumulative walk over the same packed outcome table, the same Q table) on a
synthetic 200 x 200 grid with 8 moves, actuation slip, a drift band and a hazard band.
The plain loop runs the comparison episodes once, the kernel runs them ``--repeats``
times (fresh Q each time); rates are compared, not totals.

Usage::

    python3 benchmarks/bench_learn.py [--episodes N] [--repeats N] [--long N] [--trials N] [--layout gate|wide]

Not a test: run by hand, on an otherwise idle machine for figures worth quoting.
"""

from __future__ import annotations

import argparse
import platform
import time

import numpy as np

from planner.grid import FREE, DriftInfo, HazardInfo, grid_from_arrays
from planner.learn import LearnSettings, train
from planner.learn_kernels import sampling_table
from planner.learn_paths import heuristic_q, model_cost_to_go
from planner.model import Dynamics, build_model


def synthetic_model(layout: str = "gate", n: int = 200):
    """A 200 x 200 yard of 1 m cells: start south, goal north, a hazard band between.

    ``gate``: the hazard band (rows 95-104) spans columns 20-179 with a 10-cell gate in
    the middle; a drift band (rows 130-159) pushes east 0.5 m per move (spread 0.3 m,
    acting on 80% of moves). ``wide``: the band spans columns 30-169 with no gate (the
    route goes round an end) and the drift is strong (1.5 m east, spread 0.5 m, 70%),
    so trajectories spread over much more of the grid.
    """
    label = np.full((n, n), FREE, dtype=np.int16)
    drift_class = np.zeros((n, n), dtype=np.int32)
    if layout == "gate":
        label[95:105, 20:180] = 0
        label[95:105, 95:105] = FREE
        drift_class[130:160, :] = 1
        drift = DriftInfo("east gust", ratio=0.5, toward_deg=90.0, spread=0.3, chance=0.8)
    elif layout == "wide":
        label[90:110, 30:170] = 0
        drift_class[120:150, :] = 1
        drift = DriftInfo("east gust", ratio=1.5, toward_deg=90.0, spread=0.5, chance=0.7)
    else:
        raise SystemExit(f"unknown layout {layout!r}")
    goal = np.zeros((n, n), dtype=bool)
    goal[190, 100] = True
    grid = grid_from_arrays(label, goal=goal, start=(10, 100), hazards=(HazardInfo("band"),), drifts=(drift,),
                            drift_class=drift_class, drift_members=((), (0,)))
    return build_model(grid, Dynamics(n_actions=8, slip=0.1))


class _Draws:
    """Batches of random numbers from a numpy Generator, handed out one at a time."""

    def __init__(self, rng: np.random.Generator, batch: int = 1 << 16):
        self.rng, self.batch = rng, batch
        self._refill()

    def _refill(self):
        self.ints = self.rng.integers(0, 2**32, size=self.batch, dtype=np.uint64).tolist()
        self.floats = self.rng.random(self.batch).tolist()
        self.i = self.f = 0

    def uint32(self) -> int:
        if self.i == self.batch:
            self._refill()
        self.i += 1
        return self.ints[self.i - 1]

    def uniform(self) -> float:
        if self.f == self.batch:
            self._refill()
        self.f += 1
        return self.floats[self.f - 1]


def plain_python(model, table, q, method: str, settings: LearnSettings, rng: np.random.Generator):
    """The kernel's update as a plain-Python loop over the same tables.

    Runs ``settings.episodes`` episodes from the start; returns (steps, seconds).
    """
    offsets = model.offsets.tolist()
    threshold = table["threshold"].tolist()
    code = table["code"].tolist()
    reward = table["reward"].tolist()
    q = q.ravel().tolist()
    n_a, eps, alpha, gamma = model.n_actions, settings.epsilon, settings.step_size, settings.gamma
    draws = _Draws(rng)
    sarsa = method == "sarsa"

    def greedy(base):
        best = max(q[base:base + n_a])
        a, ties = 0, 0
        for b in range(n_a):
            if q[base + b] == best:
                ties += 1
                if ties == 1:
                    a = b
                elif draws.uniform() * ties < 1.0:
                    a = b
        return a, best

    def explore(g):
        u = draws.uniform()
        return min(int(u / eps * n_a), n_a - 1) if u < eps else g

    steps = 0
    began = time.perf_counter()
    for _ in range(settings.episodes):
        base = model.start * n_a
        a = explore(greedy(base)[0])
        t = 0
        while True:
            k = base + a
            j, last = offsets[k], offsets[k + 1] - 1
            d = draws.uint32()
            while j < last and d >= threshold[j]:
                j += 1
            r, c = reward[j], code[j]
            t += 1
            if c < 0:
                q[k] += alpha * (r - q[k])
                break
            base2 = c * n_a
            g2, best2 = greedy(base2)
            if sarsa:
                a2 = explore(g2)
                q[k] += alpha * (r + gamma * q[base2 + a2] - q[k])
            else:
                q[k] += alpha * (r + gamma * best2 - q[k])
                if base2 == base:
                    g2, best2 = greedy(base2)
                a2 = explore(g2)
            if t >= settings.max_steps:
                break
            base, a = base2, a2
        steps += t
    return steps, time.perf_counter() - began


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--episodes", type=int, default=1000,
                        help="episodes of the side-by-side comparison (both loops start from the same Q)")
    parser.add_argument("--repeats", type=int, default=32,
                        help="the numba kernel repeats the comparison episodes this many times (fresh Q each)")
    parser.add_argument("--long", type=int, default=30_000, help="episodes of the sustained numba run")
    parser.add_argument("--trials", type=int, default=5, help="timed trials of the numba runs (best is kept)")
    parser.add_argument("--layout", choices=["gate", "wide"], default="gate")
    args = parser.parse_args(argv)

    began = time.perf_counter()
    model = synthetic_model(args.layout)
    print(f"grid 200 x 200, 8 moves, layout {args.layout}: {int(model.active.sum()):,} active states, "
          f"{model.n_outcomes:,} outcomes ({model.n_outcomes / (model.active.sum() * 8):.2f} per state-action); "
          f"model built in {time.perf_counter() - began:.1f} s")
    print(f"python {platform.python_version()}, {platform.machine()}, numpy {np.__version__}; one thread throughout")
    # Compile (or load from the cache) before timing.
    for method in ("qlearning", "sarsa"):
        train(model, method, LearnSettings(episodes=2, n_seeds=1), seed=0, n_jobs=1)

    q0 = heuristic_q(model, model_cost_to_go(model))
    table = sampling_table(model)
    rng = np.random.default_rng(20261202)
    short = LearnSettings(episodes=args.episodes, n_seeds=args.repeats, max_steps=2000)
    plain_settings = LearnSettings(episodes=args.episodes, max_steps=2000)
    for method in ("qlearning", "sarsa"):
        # Side by side: the same episodes from the same initial Q, so both loops do the
        # same kind of work (early episodes wander differently from late ones). Best of
        # --trials, since other work on the machine only ever slows a run down.
        fast = [train(model, method, short, seed=1, n_jobs=1) for _ in range(args.trials)]
        rates = sorted(run.steps_per_second for run in fast)
        plain_runs = [plain_python(model, table, q0.copy(), method, plain_settings, rng) for _ in range(2)]
        plain = max(steps / seconds for steps, seconds in plain_runs)
        steps = plain_runs[0][0]
        print(f"  {method:9s} numba : {fast[0].steps_total:>11,} steps per trial, {args.repeats} x {args.episodes} "
              f"episodes (mean {fast[0].moves.mean():.0f} moves): best {rates[-1] / 1e6:.1f} M steps/s, "
              f"median {rates[len(rates) // 2] / 1e6:.1f}, worst {rates[0] / 1e6:.1f} over {args.trials} trials")
        print(f"  {method:9s} plain : {steps:>11,} steps per trial, 1 x {args.episodes} episodes "
              f"(mean {steps / args.episodes:.0f} moves): best {plain / 1e6:.3f} M steps/s of 2 trials")
        print(f"  {method:9s} speed-up over plain Python: {rates[-1] / plain:.0f}x (best against best)")
        sustained = [train(model, method, LearnSettings(episodes=args.long, n_seeds=1, max_steps=2000), seed=2,
                           n_jobs=1) for _ in range(max(1, args.trials // 2))]
        best = max(run.steps_per_second for run in sustained)
        print(f"  {method:9s} numba sustained: {sustained[0].steps_total:>11,} steps, 1 x {args.long} episodes "
              f"(mean {sustained[0].moves.mean():.0f} moves): best {best / 1e6:.1f} M steps/s")


if __name__ == "__main__":
    main()
