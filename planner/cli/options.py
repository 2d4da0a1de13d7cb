"""Options shared by several commands, defined once, and the help layout in sections.

Names follow two rules a person can hold in mind: what shapes the plan starts with
``--plan-`` (``--plan-drift``) and what only fills the risk table with ``--table-``
(``--table-noises``, ``--table-drifts``); a run folder is always the positional RUN
and ``-o`` always names the one file a command writes.
"""

from __future__ import annotations

import click

from planner.cli.option_names import as_options
from planner.errors import PlannerError, SettingsError
from planner.grid import DEFAULT_MAX_CELLS
from planner.site import DEFAULT_MAX_BYTES

#: Help sections, in the order ``--help`` shows them, and the parameters in each.
SECTIONS = {
    "Output": ("output", "fmt", "force", "as_json", "strict", "details", "quiet", "policy", "policies", "contents",
               "alt_m", "ground_elev_m", "dem", "vertical_datum", "settings"),
    "Site file": ("crs", "fix", "max_bytes"),
    "Grid": ("cell_m", "hazard_overlap", "boundary_cover", "max_cells"),
    "Vehicle and motion": ("n_actions", "headings", "move_m", "slip", "stall", "drift_scale", "edge", "penalty_m"),
    "Learning": ("epsilon", "step_size", "step_decay", "gamma", "episodes", "max_steps", "n_seeds", "start_mode",
                 "q_init", "seed", "tie_m", "cautious_schedule", "shortest_schedule", "max_sweeps"),
    "Risk table": ("noises", "drift_scales", "budget_m", "budget_min", "speed_mps", "rollouts", "rollout_seed",
                   "grid_check", "grid_levels"),
    "Risk budget": ("risk_budget", "budget_set_by"),
    "Campaign": ("out_dir", "scheduler", "n_workers", "check_only"),
}
_SECTION_OF = {name: title for title, names in SECTIONS.items() for name in names}
_ORDER = {name: k for k, name in enumerate(n for names in SECTIONS.values() for n in names)}


class SectionedCommand(click.Command):
    """A command whose ``--help`` lists its options in the sections of :data:`SECTIONS`."""

    def format_options(self, ctx, formatter):
        """Write the options into the help, section by section."""
        groups: dict[str, list] = {}
        for param in self.get_params(ctx):
            record = param.get_help_record(ctx)
            if record is not None:
                title = _SECTION_OF.get(param.name, "Other options")
                groups.setdefault(title, []).append((_ORDER.get(param.name, len(_ORDER)), record))
        for title in [*SECTIONS, "Other options"]:
            if title in groups:
                with formatter.section(title):
                    formatter.write_dl([record for _, record in sorted(groups[title], key=lambda x: x[0])])


    def invoke(self, ctx):
        """Run the command; a library error's setting names become this command's options (or file keys)."""
        try:
            return super().invoke(ctx)
        except PlannerError as err:
            if getattr(err, "said_as_options", None) is None:
                err.said_as_options = as_options(str(err), ctx)
            raise


class Number(click.ParamType):
    """A number as typed; whether it is in range is the setting's own rule (:mod:`planner.checks`)."""

    name = "number"

    def convert(self, value, param, ctx):
        """The value as a float (``nan`` and ``inf`` pass here and are refused by the setting's rule)."""
        return click.FLOAT.convert(value, param, ctx)


def number() -> Number:
    """A click type for a number whose range the settings check (one rule, one message)."""
    return Number()


class RiskBudget(click.ParamType):
    """A risk budget: a probability strictly between 0 and 1 (refused in one line naming the option)."""

    name = "probability"

    def convert(self, value, param, ctx):
        """The budget as a float (``planner.budget_plan.check_budget``)."""
        from planner.budget_plan import check_budget
        from planner.errors import SettingsError

        try:
            return check_budget(value, option="")
        except SettingsError as err:
            self.fail(str(err).strip(), param, ctx)


def risk_budget_options(f):
    """``--risk-budget`` and who set it."""
    f = click.option("--risk-budget", "risk_budget", type=RiskBudget(), default=None, metavar="P",
                     help="Also deliver the shortest route whose exact P(incident) is at most P (in (0, 1), e.g. "
                          "1e-3), at --epsilon and --plan-drift, with the trade-off curve and why each route is "
                          "risky.")(f)
    f = click.option("--budget-set-by", "budget_set_by", default=None, metavar="NAME",
                     show_default="a blank field on the sign-off, filled in by hand",
                     help="Who set the risk budget (name, role): printed in the briefing's sign-off.")(f)
    return f


#: One or more site files: GeoJSON, or with the gis extra any vector format GDAL reads;
#: several are merged into one site (a boundary in one, hazards in another).
site_argument = click.argument("site", nargs=-1, required=True, type=click.Path(dir_okay=False, path_type=str))
run_argument = click.argument("run", type=click.Path(path_type=str))


def output_option(help_text: str, *, required: bool = True):
    """``-o/--output FILE``: the one file a command writes (every command means the same by it)."""
    return click.option("-o", "--output", required=required, metavar="FILE",
                        type=click.Path(dir_okay=False, path_type=str), help=help_text)


force_option = click.option("--force", is_flag=True, help="Replace what is already at the output path.")


def site_options(f):
    """Options that control how a site file is read and projected."""
    f = click.option("--crs", default=None, metavar="CRS",
                     help="Projected metric CRS to work in (e.g. EPSG:32632); the site file itself is always "
                          "lon/lat.", show_default="local transverse Mercator centred on the site")(f)
    f = click.option("--fix", is_flag=True, help="Repair invalid polygons (with a warning) instead of refusing them.")(f)
    f = click.option("--max-bytes", type=int, metavar="N", default=DEFAULT_MAX_BYTES, show_default=True,
                     help="Refuse site files larger than this many bytes before reading them.")(f)
    return f


def grid_options(f):
    """Options that control rasterising."""
    f = click.option("--cell", "cell_m", type=number(), default=None, metavar="M",
                     show_default="about 1/100 of the site's longer side, rounded to 0.5 m",
                     help="Cell size in metres: how finely the site is drawn.")(f)
    f = click.option("--hazard-overlap", type=number(), default=0.0, show_default=True,
                     help="A cell is hazard when a buffered hazard covers more than this fraction of it, in [0, 1).")(f)
    f = click.option("--boundary-cover", type=number(), default=1.0, show_default=True,
                     help="A cell is inside when the boundary covers at least this fraction of it, in (0, 1].")(f)
    f = click.option("--max-cells", type=int, metavar="N", default=DEFAULT_MAX_CELLS, show_default=True,
                     help="Refuse grids with more cells than this.")(f)
    return f


def dynamics_options(f):
    """Options of the transition model."""
    f = click.option("--headings", "n_actions", type=int, default=8, show_default=True,
                     help="Headings the vehicle chooses among: 4, 8 or 16 (16 adds the 22.5-degree ones).")(f)
    f = click.option("--move-m", "move_m", type=float, default=None, metavar="M",
                     help="Move length: metres travelled between heading decisions (at least one cell; "
                          "default: the site's default cell size, or one cell when --cell is coarser).")(f)
    f = click.option("--slip", type=number(), default=0.1, show_default=True,
                     help="Probability a move (of --move-m) veers to a neighbouring heading, in [0, 1].")(f)
    f = click.option("--stall", type=number(), default=0.0, show_default=True,
                     help="Probability a move (of --move-m) makes no headway (drift still acts), in [0, 1]; with --slip at most 1.")(f)
    f = click.option("--plan-drift", "drift_scale", type=number(), default=1.0, show_default=True,
                     help="Drift scale the routes are planned for: multiplies every drift push and spread "
                          "(1 = as forecast). The risk table's scales are --table-drifts.")(f)
    f = click.option("--edge", type=click.Choice(["boundary", "wall"]), default="boundary", show_default=True,
                     help="Leaving the boundary is an incident (boundary) or blocked (wall).")(f)
    f = click.option("--penalty", "penalty_m", type=number(), default=None, metavar="M",
                     show_default="twice the longest cheapest route to the goal, rounded up to 10 m",
                     help="Hazard penalty in metres-equivalent for hazards without their own penalty_m.")(f)
    return f


def learn_options(f):
    """Options of the two learners."""
    f = click.option("--epsilon", type=number(), default=0.1, show_default=True,
                     help="Execution noise the cautious policy is planned for (share of moves made at random), in "
                          "[0, 1); also the noise of the headline figures.")(f)
    f = click.option("--step-size", type=number(), default=0.1, show_default=True,
                     help="Constant step size, in (0, 1].")(f)
    f = click.option("--step-decay", type=number(), default=None, metavar="W",
                     help="Use step size 1/n(s,a)^W instead of a constant; W in (0.5, 1].")(f)
    f = click.option("--gamma", type=number(), default=1.0, show_default=True,
                     help="Discount, in (0, 1] (1 = none).")(f)
    f = click.option("--episodes", type=int, metavar="N", default=None,
                     show_default="50 per usable cell, 20,000 to 500,000",
                     help="Training episodes per training run.")(f)
    f = click.option("--max-steps", type=int, metavar="N", default=None,
                     show_default="10 x the fewest moves to the goal", help="Episode step cap.")(f)
    f = click.option("--training-runs", "n_seeds", type=int, metavar="N", default=8, show_default=True,
                     help="Independent training runs per learner (each from its own seed spawned from "
                          "--root-seed); figures are reported as a range over them.")(f)
    f = click.option("--start-mode", type=click.Choice(["start", "explore"]), default="explore",
                     show_default=True, help="Episodes begin at the start, or also near the start-goal corridor.")(f)
    f = click.option("--q-init", type=click.Choice(["heuristic", "zeros"]), default="heuristic", show_default=True,
                     help="Initial Q: from a shortest-path heuristic, or zeros.")(f)
    f = click.option("--root-seed", "seed", type=int, default=None, metavar="N",
                     show_default="fresh entropy, recorded in the manifest",
                     help="Root seed of the whole run; every training run and the Monte Carlo rollouts get "
                          "seeds spawned from it.")(f)
    return f


def risk_table_options(f, *, defaults_from_run: bool = False):
    """Options of the risk table: its noise levels and drift scales, budget and rollouts."""
    run_default = "the run's" if defaults_from_run else None
    f = click.option("--table-noises", "noises", default=None if defaults_from_run else "0,0.05,0.1,0.2",
                     metavar="LIST", show_default=run_default or True,
                     help="Execution noise levels of the risk table, comma-separated, each in [0, 1).")(f)
    f = click.option("--table-drifts", "drift_scales", default=None if defaults_from_run else "1,1.5,2",
                     metavar="LIST", show_default=run_default or True,
                     help="Drift scales of the risk table, comma-separated, each >= 0 (2 = drift twice the "
                          "forecast). The planning scale is --plan-drift.")(f)
    f = click.option("--budget-m", "budget_m", type=number(), default=None, metavar="M",
                     help="Also report risk within this many metres travelled, and P(timeout).")(f)
    f = click.option("--budget-min", "budget_min", type=number(), default=None, metavar="MIN",
                     help="The same budget as minutes of travel at --speed-mps (instead of --budget-m).")(f)
    f = click.option("--speed-mps", "speed_mps", type=number(), default=None, metavar="V",
                     show_default=run_default,
                     help="Speed over ground, metres per second, that --budget-min is travelled at.")(f)
    f = click.option("--rollouts", type=int, metavar="N", default=None if defaults_from_run else 20000,
                     show_default=run_default or True,
                     help="Monte Carlo rollouts per row of the risk table (0 = none).")(f)
    return f


def float_list(text: str, setting: str) -> tuple[float, ...]:
    """Parse "0,0.05,0.1" into floats, checked by the rule of ``setting`` (``PlanSettings.noises``)."""
    from planner import checks

    try:
        values = tuple(float(v) for v in text.split(",") if v.strip())
    except ValueError as err:
        raise SettingsError(f"{setting} {text!r} is not a comma-separated list of numbers") from err
    return checks.LIST_RULES[setting](values, setting)
