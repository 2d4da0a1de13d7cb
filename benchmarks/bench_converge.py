"""Both learners to a converged risk verdict on large grids: time and peak memory.

Each case runs in its own process (so its peak resident memory is its own) and does
what ``veerwise plan`` does before the risk table: build the model, solve the exact
references (optimal and epsilon-greedy on-policy value iteration) and break their ties
by safety, then train SARSA and Q-learning in sweeps (8 seeds each, the plan's
defaults), checking the risk verdict against those references at the plan's check
marks and stopping at the first that passes, or at ``--max-sweeps``.

Cases:

``ground-1m``
    ``maps/ground-yard.geojson`` at 1 m cells (the move length stays the site's
    default, 4.5 m, so a move spans several cells).
``synthetic-500``
    a 500 x 500 yard of 1 m cells, 1 m moves, slip 0.1: start south, goal north, an
    ending hazard band across the middle with a 25-cell gate, two masts beside the
    corridor north of it and a gust band pushing east.

Usage::

    python3 benchmarks/bench_converge.py [--cases ground-1m synthetic-500] [--max-sweeps N]

Targets: ground-1m both converged within 60 s and 1.5 GB; synthetic-500 within 120 s
and 2 GB (2 cores). Not a test: run by hand; the machine's load goes with the figures.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
TARGETS = {"ground-1m": (60.0, 1.5 * 2**30), "synthetic-500": (120.0, 2.0 * 2**30)}


def synthetic_500():
    """The 500 x 500 synthetic yard (see the module docstring)."""
    from planner.grid import FREE, DriftInfo, HazardInfo, grid_from_arrays
    from planner.model import Dynamics, build_model

    n = 500
    label = np.full((n, n), FREE, dtype=np.int16)
    label[240:260, 40:460] = 0
    label[240:260, 238:263] = FREE
    label[300:320, 215:235] = 1
    label[330:350, 262:282] = 1
    drift_class = np.zeros((n, n), dtype=np.int32)
    drift_class[380:430, :] = 1
    goal = np.zeros((n, n), dtype=bool)
    goal[470:475, 248:253] = True
    grid = grid_from_arrays(label, goal=goal, start=(25, 250), hazards=(HazardInfo("band"), HazardInfo("masts")),
                            drifts=(DriftInfo("east gust", ratio=0.4, toward_deg=90.0, spread=0.3, chance=0.8),),
                            drift_class=drift_class, drift_members=((), (0,)))
    return build_model(grid, Dynamics(n_actions=8, slip=0.1))


def ground_1m():
    """The ground-robot demo yard at 1 m cells, the vehicle as ``plan`` makes it."""
    from planner.cli.site_commands import load_site_and_spec, make_dynamics
    from planner.grid import rasterise
    from planner.model import build_model

    site, spec = load_site_and_spec(str(ROOT / "maps" / "ground-yard.geojson"), None, False, 50_000_000, 1.0, 0.0,
                                    1.0, 2_000_000)
    dynamics = make_dynamics(8, 0.1, 0.0, 1.0, "boundary", None, None, site, spec)
    return build_model(rasterise(site, spec), dynamics)


def _stage(case: str, text: str) -> None:
    """A stage finished: said at once on stderr (a case stopped by a time bound shows how far it got)."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"  [{case}] {text}; peak so far {peak:,.0f} MiB", file=sys.stderr, flush=True)


def run_case(name: str, max_sweeps: int) -> dict:
    """One case in this process; returns its figures."""
    from planner.exact import on_policy_q, optimal_q
    from planner.learn import SARSA_SWEEP_HORIZON, LearnSettings, learned_ties, train
    from planner.learn_paths import model_cost_to_go
    from planner.ties import equally_good, safest_among
    from planner.verdict import risk_verdict

    out = {"case": name}
    began = t = time.perf_counter()
    model = {"ground-1m": ground_1m, "synthetic-500": synthetic_500}[name]()
    out["model_s"] = time.perf_counter() - t
    out["states"], out["outcomes"] = int(model.n_states), int(model.n_outcomes)
    _stage(name, f"model {out['model_s']:.1f} s, {model.n_outcomes:,} outcomes")
    eps, tie_m = 0.1, 0.01
    t = time.perf_counter()
    exact = {"cautious": on_policy_q(model, eps), "shortest": optimal_q(model)}
    references = {k: safest_among(model, equally_good(v.q, tie_m), eps, value=v.q) for k, v in exact.items()}
    out["exact_s"] = time.perf_counter() - t
    _stage(name, f"exact references and ties {out['exact_s']:.1f} s")
    cheapest = float(-model.reward[model.event == 0].max())
    slack = tie_m + 0.05 * cheapest
    to_go = model_cost_to_go(model)
    check_s = [0.0]

    def rule_for(name):
        def rule(_mean, q):
            t0 = time.perf_counter()
            greedy = safest_among(model, learned_ties(q, tie_m, max_slack_m=slack), eps, value=q.mean(axis=0),
                                  riskiest=False).greedy
            verdict = risk_verdict(model, greedy, references[name])
            check_s[0] += time.perf_counter() - t0
            return verdict.converged, verdict.p_incident
        return rule

    base = LearnSettings(epsilon=eps, n_seeds=8, schedule="sweeps", max_sweeps=max_sweeps)
    for policy, method, how in (("cautious", "sarsa", dataclasses.replace(base, sweep_horizon=SARSA_SWEEP_HORIZON)),
                                ("shortest", "qlearning", base)):
        check_s[0] = 0.0
        t = time.perf_counter()
        learned = train(model, method, how, seed=1, cost_to_go=to_go, stop_rule=rule_for(policy))
        out[policy] = {"learn_s": time.perf_counter() - t, "checks_s": check_s[0], "sweeps": learned.n_sweeps,
                       "updates": int(learned.steps_total), "converged": bool(learned.stopped_by_rule),
                       "p_incident": float(learned.check_p_incident[-1]),
                       "reference": [references[policy].p_incident, references[policy].p_incident_max]}
        _stage(name, f"{method}: {learned.n_sweeps:,} sweeps in {out[policy]['learn_s']:.1f} s")
    out["total_s"] = time.perf_counter() - began
    out["peak_bytes"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", nargs="+", default=list(TARGETS), choices=list(TARGETS))
    parser.add_argument("--max-sweeps", type=int, default=8192)
    parser.add_argument("--child", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        print(json.dumps(run_case(args.child, args.max_sweeps)))
        return
    print(f"load average before: {os.getloadavg()[0]:.1f}; {os.cpu_count()} cores")
    missed = False
    for case in args.cases:
        env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
        done = subprocess.run([sys.executable, __file__, "--child", case, "--max-sweeps", str(args.max_sweeps)],
                              stdout=subprocess.PIPE, text=True, env=env)
        if done.returncode != 0:
            print(f"{case}: failed (exit {done.returncode}; its stderr is above)")
            missed = True
            continue
        r = json.loads(done.stdout.strip().splitlines()[-1])
        wall, peak = TARGETS[case]
        ok = r["total_s"] <= wall and r["peak_bytes"] <= peak and r["cautious"]["converged"] \
            and r["shortest"]["converged"]
        missed |= not ok
        print(f"{case}: {r['states']:,} states, {r['outcomes']:,} outcomes; model {r['model_s']:.1f} s, exact "
              f"references and ties {r['exact_s']:.1f} s; total {r['total_s']:.1f} s, peak "
              f"{r['peak_bytes'] / 2**20:,.0f} MiB (target {wall:g} s, {peak / 2**30:g} GiB): "
              f"{'met' if ok else 'NOT met'}")
        for policy in ("cautious", "shortest"):
            x = r[policy]
            print(f"  {policy}: {x['sweeps']:,} sweeps, {x['updates']:.3g} updates, {x['learn_s']:.1f} s "
                  f"(checks {x['checks_s']:.1f} s), {'converged' if x['converged'] else 'NOT converged'}, "
                  f"P(incident) {x['p_incident']:.4g} (reference {x['reference'][0]:.4g} to {x['reference'][1]:.4g})")
    print(f"load average after: {os.getloadavg()[0]:.1f}")
    sys.exit(1 if missed else 0)


if __name__ == "__main__":
    main()
