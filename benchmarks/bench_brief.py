"""How long the briefing takes to render (HTML, then PDF), and what the PDF holds.

For each demo site a run folder is planned once (quick training settings: the
briefing's size does not depend on convergence), then ``planner.brief.write_brief`` is
timed ``--repeats`` times in this process, once as the site is and once with a zone
name of 10,000 characters written as one word (the case that used to keep the PDF
layout busy for minutes). Reported: best and range of the wall time, pages, PDF and
HTML size. Exits non-zero when a target is missed.

Targets: a demo-site briefing in under 10 s; the 10,000-character name in under 30 s.

    python3 benchmarks/bench_brief.py                   # both demo sites, 3 repeats
    python3 benchmarks/bench_brief.py --runs RUN ...    # existing run folders instead
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
SITES = ("ground-yard", "drone-range")
QUICK = ["--seed", "1", "--episodes", "20000", "--rollouts", "2000", "-q"]
TARGET_S = 10.0
TARGET_LONG_S = 30.0
LONG_NAME = "Z" * 10_000


def plan(site: Path, out: Path) -> Path:
    subprocess.run([sys.executable, "-c", "from planner.cli import cli; cli()", "plan", str(site), "--out", str(out),
                    *QUICK], check=True, stdout=subprocess.DEVNULL)
    return out


def inputs_of(folder: Path):
    from planner.brief import BriefInputs
    from planner.risk import RiskRow
    from planner.runload import load_run, rebuild, run_routes

    run = load_run(folder)
    site, grid, model = rebuild(run)
    rows = [RiskRow.from_dict(r) for r in json.loads((run.folder / "risk.json").read_text())]
    return BriefInputs(folder=run.folder, site=site, grid=grid, routes=run_routes(run, site, grid, model),
                       risk_rows=rows, settings=run.settings, manifest=run.manifest, run_name=run.folder.name)


def time_brief(inputs, scratch: Path, repeats: int) -> dict:
    from pypdf import PdfReader

    from planner.brief import write_brief

    scratch.mkdir(parents=True, exist_ok=True)
    for png in Path(inputs.folder).glob("*.png"):
        shutil.copyfile(png, scratch / png.name)
    inputs = dataclasses.replace(inputs, folder=scratch)
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        html_path, pdf_path = write_brief(inputs, scratch / "brief.html", scratch / "brief.pdf")
        times.append(time.perf_counter() - t)
    return {"best_s": min(times), "worst_s": max(times), "pages": len(PdfReader(pdf_path).pages),
            "pdf_kib": pdf_path.stat().st_size / 1024, "html_kib": html_path.stat().st_size / 1024}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--runs", nargs="*", type=Path, help="existing run folders (default: plan the demo sites)")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        runs = args.runs or [plan(ROOT / "maps" / f"{name}.geojson", tmp / name) for name in SITES]
        print("| run | briefing (HTML + PDF) | pages | PDF | HTML | 10,000-character name |")
        print("|---|---|---|---|---|---|")
        ok = True
        for folder in runs:
            inputs = inputs_of(folder)
            plain = time_brief(inputs, tmp / "brief" / folder.name, args.repeats)
            long_inputs = dataclasses.replace(inputs, site=dataclasses.replace(inputs.site, name=LONG_NAME))
            long = time_brief(long_inputs, tmp / "long" / folder.name, 1)
            print(f"| {folder.name} | {plain['best_s']:.2f} s ({plain['best_s']:.2f}-{plain['worst_s']:.2f}) | "
                  f"{plain['pages']} | {plain['pdf_kib']:,.0f} KiB | {plain['html_kib']:,.0f} KiB | "
                  f"{long['best_s']:.2f} s, {long['pages']} pages |")
            ok &= plain["best_s"] < TARGET_S and long["best_s"] < TARGET_LONG_S
    print(f"targets (briefing < {TARGET_S:g} s, long name < {TARGET_LONG_S:g} s): {'met' if ok else 'MISSED'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
