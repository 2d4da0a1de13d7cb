"""How much riskier do the planned routes get if the wind is stronger than forecast?

Plans one demo site once, for the forecast wind (drift scale 1), then computes each
policy's incident probability exactly for a range of wind strengths (drift scales)
and draws them on one chart. The routes stay the ones planned for the forecast: the
question is what happens to *these* routes on a windier day.

    python3 examples/wind_sensitivity.py
    python3 examples/wind_sensitivity.py --site maps/ground-yard.geojson --table-drifts 1,2,3 -o wind.png

For simulation and review only: not approved for field operation.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402

from planner import style  # noqa: E402
from planner.errors import PlannerError  # noqa: E402
from planner.grid import GridSpec  # noqa: E402
from planner.learn import LearnSettings  # noqa: E402
from planner.motion import Dynamics  # noqa: E402
from planner.pipeline import compute_plan  # noqa: E402
from planner.risk import format_prob  # noqa: E402
from planner.settings import PlanSettings  # noqa: E402

HERE = Path(__file__).resolve().parent
DEFAULT_SITE = HERE.parent / "maps" / "drone-range.geojson"

#: The learned policies and the exact references they should match, as drawn.
LOOKS = {
    "cautious": style.POLICY["cautious"], "shortest": style.POLICY["shortest"],
    "exact on-policy": style.REFERENCE["cautious"], "exact optimal": style.REFERENCE["shortest"],
}


def parse_args(argv=None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--site", type=Path, default=DEFAULT_SITE, help="site file (GeoJSON); default: %(default)s")
    parser.add_argument("-o", "--output", type=Path, default=Path("wind-sensitivity.png"),
                        help="chart to write (PNG)")
    parser.add_argument("--table-drifts", default="1,1.25,1.5,2,2.5,3",
                        help="drift scales to compare, comma-separated (1 = the forecast); default: %(default)s")
    parser.add_argument("--noise", type=float, default=0.1,
                        help="execution noise: share of moves made in a random direction; default: %(default)s")
    parser.add_argument("--episodes", type=int, default=300_000, help="training episodes per seed; default: %(default)s")
    parser.add_argument("--training-runs", type=int, default=4, help="independent training runs per learner")
    parser.add_argument("--cell", type=float, default=5.0, help="cell size in metres; default: %(default)s")
    parser.add_argument("--move-m", type=float, default=None,
                        help="metres the vehicle travels between heading decisions (>= the cell); default: one cell")
    parser.add_argument("--root-seed", type=int, default=2024, help="root seed, for a reproducible run")
    return parser.parse_args(argv)


def main(argv=None) -> int:
    args = parse_args(argv)
    try:
        scales = tuple(float(s) for s in args.table_drifts.split(",") if s.strip())
    except ValueError:
        print(f"wind_sensitivity: --table-drifts {args.table_drifts!r} is not a comma-separated list of numbers", file=sys.stderr)
        return 2
    if 1.0 not in scales:
        scales = (1.0, *scales)  # the forecast is the reference every other row is read against
    try:
        settings = PlanSettings(
            grid=GridSpec(args.cell), dynamics=Dynamics(move_m=args.move_m),
            learn=LearnSettings(epsilon=args.noise, episodes=args.episodes, n_seeds=args.training_runs,
                                start_mode="explore"),
            noises=(args.noise,), drift_scales=scales, rollouts=0, seed=args.root_seed,
        )
        result = compute_plan(args.site, settings)
    except PlannerError as err:
        print(f"wind_sensitivity: {err}", file=sys.stderr)
        return 2

    # one row per policy and drift scale (a single noise level was asked for)
    table = {}
    for row in result.risk_rows:
        table.setdefault(row.policy, {})[row.drift_scale] = row.p_incident

    print(f"{result.site.name}: P(incident) per run at execution noise {args.noise:g} (for simulation and "
          "review only)")
    print(f"{'drift scale':>12s}" + "".join(f"{name:>26s}" for name in table))
    for m in sorted(scales):
        print(f"{m:12g}" + "".join(f"{format_prob(table[name][m]):>26s}" for name in table))
    unconverged = [name for name, conv in result.convergence.items() if not conv.converged]
    for name, conv in result.convergence.items():
        print(f"  {name}: {conv.message}")

    fig, ax = plt.subplots(figsize=(7.5, 4.5), dpi=style.FIGURE_DPI)
    floor = 1e-7  # a log axis cannot show 0
    for name, values in table.items():
        look = LOOKS.get(name, {"color": "grey", "linestyle": "-", "label": name})
        learned = name in style.POLICY
        ax.plot(sorted(values), [max(values[m], floor) for m in sorted(values)], color=look["color"],
                ls=look["linestyle"], lw=2.2 if learned else 1.2, marker="o" if learned else None, ms=4,
                label=look["label"])
    ax.set_yscale("log")
    ax.set_xlabel("drift scale (1 = wind as forecast, 2 = twice as strong)")
    ax.set_ylabel(f"P(incident before goal), noise {args.noise:g}")
    title = f"{result.site.name} - planned routes in stronger wind"
    ax.set_title(title, loc="left", fontsize=style.FONT_SIZE + 2)
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=style.FONT_SIZE - 1)
    note = style.FIGURE_NOTICE + f"; values below {floor:g} drawn at {floor:g}"
    if unconverged:
        note += f"; TRAINING NOT CONVERGED for {' and '.join(unconverged)}: train longer (--episodes)"
    fig.text(0.01, 0.005, note, fontsize=style.FONT_SIZE - 2, color=style.HAZARD if unconverged else "#666666")
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    fig.savefig(args.output, metadata={"Software": None})
    plt.close(fig)
    print(f"chart written to {args.output}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
