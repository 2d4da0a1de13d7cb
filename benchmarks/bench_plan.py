"""Benchmark: wall time of ``veerwise plan`` on each demo site, cold and warm.

Run by hand (not part of the test suite)::

    python3 benchmarks/bench_plan.py                      # both demo sites, 1 cold + 3 warm runs each
    python3 benchmarks/bench_plan.py --warm 5 --no-cold   # warm runs only
    python3 benchmarks/bench_plan.py maps/ground-yard.geojson

Each run is the command line as a user types it, in a subprocess:
``veerwise plan SITE RUN --root-seed 1 --quiet`` with every other setting at its
default. The numba compilation cache is pointed at a benchmark-owned folder with
``NUMBA_CACHE_DIR`` (numba uses that folder instead of ``__pycache__`` beside the
sources for every ``cache=True`` kernel), so that:

* the **cold** run starts from an empty folder and compiles every kernel it needs;
  the benchmark checks afterwards that the folder was filled, which shows the
  setting was honoured and the run really compiled;
* the **warm** runs reuse the folder the cold run filled (or, with ``--no-cold``, a
  folder filled by one untimed run first).

The repository's own ``__pycache__`` is never read or written by these runs.

Reported per run: wall time of the whole process, its CPU time (user + system, both
cores together) and peak resident memory (from ``os.wait4``), the stage times the
run recorded in ``manifest.json`` (``timings_s``: model, learn, exact, risk; "other"
is the rest of the wall time: interpreter start and imports, routes, occupancy,
figures, briefing, writing the folder), whether both policies converged, and the
1-minute load average when the run started (other work on the machine slows it).
After the warm runs, ``veerwise risk RUN`` is timed with all four policies of the
default table (the two learned policies and the two exact references, 4 noise levels x
3 drift scales, the run's 20,000 rollouts per row). Best and spread are over the
repeats.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
DEMO_SITES = ("maps/ground-yard.geojson", "maps/drone-range.geojson")
STAGES = ("model_s", "learn_s", "exact_s", "risk_s")
TARGET_WARM_S = 60.0
TARGET_RISK_S = 10.0
ALL_POLICIES = "cautious,shortest,exact on-policy,exact optimal"


def veerwise_command() -> list[str]:
    """The installed ``veerwise`` script, or the same entry point through this interpreter."""
    found = shutil.which("veerwise")
    if found:
        return [found]
    return [sys.executable, "-c", "import sys; from planner.cli import cli; sys.exit(cli())"]


def timed(argv: list[str], env: dict, log: Path) -> dict:
    """Run ``argv`` to completion; wall time, CPU time and peak memory of that child alone."""
    load = os.getloadavg()[0]
    with open(log, "wb") as out:
        t0 = time.perf_counter()
        proc = subprocess.Popen(argv, stdout=out, stderr=subprocess.STDOUT, env=env, cwd=REPO)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        sys.exit(f"bench_plan: {' '.join(argv)} failed with exit code {proc.returncode}; see {log}")
    return {"wall_s": wall, "cpu_s": usage.ru_utime + usage.ru_stime, "peak_mib": usage.ru_maxrss / 1024,
            "load_1min": load}


def cache_files(folder: Path) -> int:
    """How many compiled-kernel index files numba has written under ``folder``."""
    return sum(1 for _ in folder.rglob("*.nbi"))


def plan_once(site: str, cache: Path, work: Path, tag: str, seed: int) -> dict:
    env = dict(os.environ, NUMBA_CACHE_DIR=str(cache))
    run = work / f"run-{tag}"
    if run.exists():
        shutil.rmtree(run)
    argv = veerwise_command() + ["plan", site, str(run), "--root-seed", str(seed), "--quiet"]
    result = timed(argv, env, work / f"{tag}.log")
    manifest = json.loads((run / "manifest.json").read_text())
    timings = manifest["timings_s"]
    result.update({k: float(timings.get(k, float("nan"))) for k in STAGES})
    result["other_s"] = result["wall_s"] - sum(result[k] for k in STAGES)
    result["converged"] = {name: bool(r["converged"]) for name, r in manifest["results"].items()}
    result["grid"] = f"{manifest['grid']['cols']} x {manifest['grid']['rows']} @ {manifest['grid']['cell_m']:g} m"
    result["outcomes"] = manifest["model"]["outcomes"]
    result["run"] = str(run)
    return result


def risk_once(run: str, cache: Path, work: Path, tag: str) -> dict:
    env = dict(os.environ, NUMBA_CACHE_DIR=str(cache))
    argv = veerwise_command() + ["risk", run, "--policy", ALL_POLICIES, "--format", "json"]
    return timed(argv, env, work / f"{tag}.log")


def spread(values: list[float]) -> str:
    if len(values) == 1:
        return f"{values[0]:.1f}"
    return f"{min(values):.1f} (best of {len(values)}; {min(values):.1f}-{max(values):.1f})"


def line(tag: str, r: dict) -> str:
    conv = "/".join("yes" if r["converged"][k] else "NO" for k in ("cautious", "shortest"))
    return (f"  {tag:<8} wall {r['wall_s']:6.1f} s  cpu {r['cpu_s']:6.1f} s  peak {r['peak_mib']:5.0f} MiB  "
            f"model {r['model_s']:5.1f}  learn {r['learn_s']:5.1f}  exact {r['exact_s']:5.1f}  "
            f"risk {r['risk_s']:5.1f}  other {r['other_s']:5.1f}  converged {conv}  load {r['load_1min']:.1f}")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("sites", nargs="*", default=list(DEMO_SITES), help="site files (default: the demo sites)")
    parser.add_argument("--warm", type=int, default=3, help="warm-cache runs per site")
    parser.add_argument("--no-cold", action="store_true", help="skip the cold-cache run")
    parser.add_argument("--risk", type=int, default=3, help="timed 'veerwise risk' runs per site (0: none)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--json", type=Path, help="also write every measurement to this JSON file")
    args = parser.parse_args(argv)

    print(f"{os.cpu_count()} cores; command: {' '.join(veerwise_command())} plan SITE RUN "
          f"--root-seed {args.seed} --quiet")
    record = {}
    ok = True
    with tempfile.TemporaryDirectory(prefix="veerwise-bench-") as tmp:
        tmp = Path(tmp)
        for i, site in enumerate(args.sites):
            cache = tmp / f"numba-cache-{i}"
            cache.mkdir()
            work = tmp / f"site-{i}"
            work.mkdir()
            print(f"\n{site}")
            runs = {"cold": None, "warm": [], "risk": []}
            if args.no_cold:
                plan_once(site, cache, work, "fill", args.seed)
            else:
                cold = plan_once(site, cache, work, "cold", args.seed)
                n_cached = cache_files(cache)
                if n_cached == 0:
                    sys.exit("bench_plan: numba wrote nothing under NUMBA_CACHE_DIR; the cold run was not cold")
                cold["kernels_compiled"] = n_cached
                runs["cold"] = cold
                print(f"  grid {cold['grid']}, {cold['outcomes']:,} outcomes; cold run compiled {n_cached} kernels "
                      f"into an empty NUMBA_CACHE_DIR")
                print(line("cold", cold))
            before = cache_files(cache)
            for k in range(args.warm):
                warm = plan_once(site, cache, work, f"warm{k}", args.seed)
                runs["warm"].append(warm)
                print(line(f"warm {k + 1}", warm))
            if cache_files(cache) != before:
                print("  note: the warm runs compiled kernels the first run had not (cache grew)")
            if runs["warm"]:
                walls = [r["wall_s"] for r in runs["warm"]]
                risks = [r["risk_s"] for r in runs["warm"]]
                conv = all(all(r["converged"].values()) for r in runs["warm"])
                met = min(walls) < TARGET_WARM_S and conv
                ok &= met
                print(f"  warm wall {spread(walls)} s; risk stage {spread(risks)} s; both converged in every run: "
                      f"{'yes' if conv else 'NO'}; target (< {TARGET_WARM_S:.0f} s, converged): "
                      f"{'met' if met else 'MISSED'}")
                for k in range(args.risk):
                    runs["risk"].append(risk_once(runs["warm"][-1]["run"], cache, work, f"risk{k}"))
                if runs["risk"]:
                    walls = [r["wall_s"] for r in runs["risk"]]
                    met = min(walls) < TARGET_RISK_S
                    ok &= met
                    print(f"  veerwise risk RUN --policy '{ALL_POLICIES}': wall {spread(walls)} s, peak "
                          f"{max(r['peak_mib'] for r in runs['risk']):.0f} MiB; target (< {TARGET_RISK_S:.0f} s): "
                          f"{'met' if met else 'MISSED'}")
            record[site] = runs
    if args.json:
        args.json.write_text(json.dumps(record, indent=1))
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
