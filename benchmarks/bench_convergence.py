"""Benchmark: grid convergence of P(incident) with the move length held fixed.

Run by hand (not part of the test suite)::

    python3 benchmarks/bench_convergence.py                        # both demo sites, levels 1, 2, 4 (and 8)
    python3 benchmarks/bench_convergence.py maps/ground-yard.geojson --levels 1,2,4

For each demo site the move length is the default one (the site's default cell size)
and the cell is refined to move / k for each level k. At every level it reports
P(incident) at noise 0.1 (drift scale 1, default dynamics) of

* the exact shortest policy (value iteration for the optimum on that level's grid),
* the exact cautious policy (the epsilon-greedy on-policy fixed point, epsilon 0.1),
* the two delivered policies of a default ``plan`` at cell = move (learned with SARSA
  and Q-learning, seed 1), carried as a heading per position and re-evaluated, not
  re-planned, on the finer grid.

The hazard penalty is the one derived at cell = move and held fixed, so that every
level solves the same planning problem. Differences between successive levels and
their ratio (target: each at most 0.6 times the previous), the Richardson estimate with
the grid convergence index from the three finest levels (Roache, Verification and
Validation in Computational Science and Engineering, 1998), and the default cell's
distance from the finest level (target: within 15 % or 0.002) are printed as a
markdown table. A level whose model would exceed ``--max-gib`` of memory is skipped
with the estimate.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
import warnings
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from planner.exact import on_policy_q, optimal_q  # noqa: E402
from planner.grid import GridSpec, default_cell_m, rasterise  # noqa: E402
from planner.gridcheck import carry_policy, richardson
from planner.learn import greedy_actions  # noqa: E402
from planner.model import build_model, estimate_bytes  # noqa: E402
from planner.motion import Dynamics  # noqa: E402
from planner.risk import evaluate, format_prob  # noqa: E402
from planner.site import load_site  # noqa: E402

DEMO_SITES = ("maps/ground-yard.geojson", "maps/drone-range.geojson")
NOISE = 0.1
POLICIES = ("exact shortest", "exact cautious", "delivered shortest", "delivered cautious")


def delivered_policies(path, move_m):
    """Greedy policies of a default plan at cell = move (seed 1), and its grid and model."""
    from planner.cli.plan_commands import default_episodes
    from planner.learn import LearnSettings
    from planner.pipeline import compute_plan
    from planner.settings import PlanSettings

    site = load_site(path)
    spec = GridSpec(cell_m=move_m)
    grid = rasterise(site, spec)
    # As the command line's defaults are (episodes sized from the grid, exploring starts).
    learn = LearnSettings(epsilon=NOISE, episodes=default_episodes(int((grid.passable() & ~grid.goal).sum())),
                          start_mode="explore")
    settings = PlanSettings(grid=spec, dynamics=Dynamics(move_m=move_m), learn=learn, noises=(NOISE,),
                            drift_scales=(1.0,), rollouts=0, seed=1, grid_check=False)
    result = compute_plan(path, settings, site=site, grid=grid)
    return result.grid, result.model, {"delivered shortest": result.greedy["shortest"],
                                       "delivered cautious": result.greedy["cautious"]}


def level_figures(site, move_m, k, penalty_m, coarse, delivered, max_bytes):
    """P(incident) of every policy at cell = move / k, or the reason the level was skipped."""
    cell = move_m / k
    spec = GridSpec(cell_m=cell, max_cells=2_000_000)
    grid = rasterise(site, spec)
    dynamics = Dynamics(move_m=move_m, hazard_penalty_m=penalty_m)
    need = estimate_bytes(grid, dynamics)
    if need > max_bytes:
        return None, f"model about {need / 2**30:.1f} GiB, over --max-gib"
    t = time.perf_counter()
    model = build_model(grid, dynamics)
    shortest = greedy_actions(optimal_q(model).q)
    cautious = greedy_actions(on_policy_q(model, NOISE).q)
    policies = {"exact shortest": shortest, "exact cautious": cautious}
    coarse_grid, coarse_model = coarse
    for name, greedy in delivered.items():
        policies[name] = carry_policy(coarse_grid, coarse_model.active, greedy, grid)
    out = {name: float(evaluate(model, g, noise=NOISE, name=name, hazards=grid.hazards).p_incident)
           for name, g in policies.items()}
    out["_cells"] = grid.n_cells
    out["_outcomes"] = model.n_outcomes
    out["_seconds"] = time.perf_counter() - t
    return out, None


def report(path, levels, max_gib):
    site = load_site(path)
    move = default_cell_m(site)
    coarse_grid, coarse_model, delivered = delivered_policies(path, move)
    penalty = float(coarse_model.boundary_penalty_m)
    rows, skipped = {}, {}
    for k in levels:
        figures, reason = level_figures(site, move, k, penalty, (coarse_grid, coarse_model), delivered,
                                        max_gib * 2**30)
        if figures is None:
            skipped[k] = reason
            print(f"  {site.name}: cell move/{k} skipped: {reason}", file=sys.stderr)
            continue
        rows[k] = figures
        print(f"  {site.name}: cell move/{k} = {move / k:g} m: {figures['_cells']:,} cells, "
              f"{figures['_outcomes']:,} outcomes, {figures['_seconds']:.0f} s", file=sys.stderr)
    print(f"\n#### {site.name}: move {move:g} m, penalty {penalty:g} m, noise {NOISE:g}\n")
    ks = sorted(rows)
    print("| policy | " + " | ".join(f"cell {move / k:g} m (move/{k})" for k in ks)
          + " | successive differences | ratios | Richardson (order, GCI) | default vs finest |")
    print("|---|" + "---|" * (len(ks) + 4))
    for name in POLICIES:
        values = [rows[k][name] for k in ks]
        diffs = [b - a for a, b in zip(values, values[1:], strict=False)]
        ratios = [abs(b) / abs(a) if a else math.inf for a, b in zip(diffs, diffs[1:], strict=False)]
        rich = "-"
        if len(values) >= 3:
            r = richardson(values[-3:])
            if r["order"] is not None:
                rich = f"{format_prob(r['extrapolated'])} (p {r['order']:.2f}, GCI {r['gci_fine']:.1e})"
            else:
                rich = "not monotone"
        gap = abs(values[0] - values[-1])
        ok = gap <= max(0.15 * abs(values[-1]), 0.002)
        print(f"| {name} | " + " | ".join(format_prob(v) for v in values)
              + f" | {', '.join(f'{d:+.4f}' for d in diffs)} | {', '.join(f'{q:.2f}' for q in ratios) or '-'}"
              + f" | {rich} | {gap:.4f} ({'within' if ok else 'OUTSIDE'} target) |")
    for k, reason in skipped.items():
        print(f"\nmove/{k} skipped: {reason}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("sites", nargs="*", default=[str(REPO / s) for s in DEMO_SITES])
    parser.add_argument("--levels", default="1,2,4,8", help="refinements k: cell = move / k (comma-separated)")
    parser.add_argument("--max-gib", type=float, default=6.0, help="skip a level whose model needs more memory")
    args = parser.parse_args(argv)
    levels = [int(v) for v in args.levels.split(",")]
    warnings.simplefilter("ignore")
    for path in args.sites:
        report(path, levels, args.max_gib)


if __name__ == "__main__":
    main()
