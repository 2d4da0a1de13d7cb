"""``veerwise campaign``: many plans of one site at once, on this machine or a Dask cluster."""

from __future__ import annotations

import math
import time
from pathlib import Path

import click

from planner.cli import cli
from planner.cli.option_names import as_keys, setting_keys
from planner.cli.options import SectionedCommand
from planner.cli.plan_commands import progress_console
from planner.errors import SettingsError

#: Exit code when the campaign ran but not every scenario succeeded (the table says which).
EXIT_SOME_FAILED = 4
#: What may already be in a campaign's output folder: its own files from an earlier run.
CAMPAIGN_ENTRIES = ("runs", "sites", "campaign.csv", "campaign.json", "campaign.png", "campaign.html")


def _refuse(campaign_path, where: str, text: str):
    from planner.campaign import CampaignError

    return CampaignError(f"{campaign_path}: {where}{text}")


def _plan_values(campaign) -> dict[str, tuple[object, str]]:
    """[plan] options (top level or in section tables, as ``plan --settings`` reads them): name -> (value, where)."""
    from planner.cli.options import SECTIONS
    from planner.cli.plan_commands import plan
    from planner.cli.settings_file import _option_names, section_key

    known = _option_names(plan)
    sections = {section_key(title): set(names) for title, names in SECTIONS.items()}
    out = {}

    def take(key, value, where):
        if key not in known:
            raise _refuse(campaign.path, where, f"{key!r} is not an option of plan")
        if key in out:
            raise _refuse(campaign.path, where, f"{key!r} is given twice")
        out[key] = (value, where)

    for key, value in campaign.plan_options.items():
        if isinstance(value, dict):
            if key not in sections:
                raise _refuse(campaign.path, "", f"table [plan.{key}] is not a section of plan's options "
                                                 f"(sections: {', '.join(sorted(sections))})")
            for inner, inner_value in value.items():
                if inner in known and known[inner].name not in sections[key]:
                    raise _refuse(campaign.path, f"[plan.{key}] ", f"{inner!r} belongs in another section")
                take(inner, inner_value, f"[plan.{key}] ")
        else:
            take(key, value, "[plan] ")
    return out


def scenario_settings(campaign, plan_values: dict, scenario, site_of, grid_of):
    """A scenario's PlanSettings, made the way ``plan`` makes them from the same options.

    Each value goes through ``plan``'s own option type (one rule, one message), then
    ``plan``'s parser fills the defaults.
    """
    from planner.cli.plan_commands import plan
    from planner.cli.settings_file import _option_names, option_value

    known = _option_names(plan)
    values = dict(plan_values)
    for key, value in scenario.vehicle.options:
        values[key] = (value, f"vehicle {scenario.vehicle.name!r} ")
    values["plan-drift"] = (scenario.drift.scale, f"drift case {scenario.drift.name!r} scale ")
    ctx = plan.make_context("plan", ["SITE", "RUN"], resilient_parsing=True)
    default_map = {}
    for name, (value, where) in values.items():
        try:
            default_map[known[name].name] = option_value(ctx, name, known[name], value)
        except ValueError as err:
            raise _refuse(campaign.path, where, f"{name} = {value!r}: {err}") from err
    try:
        p = plan.make_context("plan", ["SITE", "RUN"], default_map=default_map).params
        return _settings_from_params(p, site_of, grid_of)
    except click.ClickException as err:
        raise _refuse(campaign.path, f"scenario {scenario.name!r}: ", err.format_message()) from err
    except SettingsError as err:
        # the setting's rule refused a value: name it by its key, where the file gave it
        keys = [k for k in setting_keys(str(err)) if k in values]
        where = values[keys[0]][1] if keys else f"scenario {scenario.name!r}: "
        raise _refuse(campaign.path, where, as_keys(str(err))) from err


def _settings_from_params(p: dict, site_of, grid_of):
    """PlanSettings from ``plan``'s parsed parameters, as ``plan`` builds them (:func:`plan_settings`)."""
    from planner.cli.options import float_list
    from planner.cli.plan_commands import plan_settings
    from planner.grid import GridSpec, default_cell_m, grid_shape

    spec_site = site_of(p["crs"], p["fix"])
    cell_m = default_cell_m(spec_site) if p["cell_m"] is None else p["cell_m"]
    spec = GridSpec(cell_m=cell_m, hazard_overlap=p["hazard_overlap"], boundary_cover=p["boundary_cover"],
                    max_cells=p["max_cells"])
    grid_shape(spec_site, spec.cell_m)
    labelled = grid_of(spec, p["crs"], p["fix"])
    # The headline figures are the table's row at the run's noise and planning drift, so
    # each scenario's table holds its own (added at the end when the list lacks it).
    noises = _with(float_list(p["noises"], "PlanSettings.noises"), p["epsilon"])
    drift_scales = _with(float_list(p["drift_scales"], "PlanSettings.drift_scales"), p["drift_scale"])
    return plan_settings(p, spec_site, spec, labelled, noises=noises, drift_scales=drift_scales, seed=None)


def _with(values, value) -> tuple[float, ...]:
    """``values`` with ``value`` added at the end unless it is already there."""
    values = tuple(values)
    return values if any(math.isclose(v, value, rel_tol=0, abs_tol=1e-12) for v in values) else (*values, value)


def checked_plan(campaign_file):
    """The campaign file read, every scenario checked and its job made (:class:`planner.campaign_jobs.Plan`)."""
    from planner.campaign import read_campaign
    from planner.campaign_jobs import check_campaign

    spec = read_campaign(campaign_file)
    plan_values = _plan_values(spec)
    return check_campaign(spec, lambda scenario, site_of, grid_of: scenario_settings(spec, plan_values, scenario,
                                                                                     site_of, grid_of))


def check_out_dir(out: Path) -> None:
    """Refuse an output folder that holds anything but an earlier run of a campaign."""
    from planner.campaign import CampaignError
    from planner.export import is_run_folder

    if out.exists() and not out.is_dir():
        raise CampaignError(f"--out {out}: exists and is not a folder")
    if not out.parent.is_dir():
        raise CampaignError(f"--out {out}: parent folder {out.parent} does not exist")
    if out.is_dir():
        if is_run_folder(out):
            raise CampaignError(f"--out {out}: is a run folder; a campaign writes its run folders inside its own")
        foreign = sorted(p.name for p in out.iterdir() if p.name not in CAMPAIGN_ENTRIES
                         and not p.name.startswith(".campaign."))
        if foreign:
            raise CampaignError(f"--out {out}: holds {foreign[0]!r}, which is not a campaign's; choose an empty or "
                                "new folder (an earlier campaign's folder is resumed)")


def estimate_s(plan, n_workers: int) -> float:
    """A rough time estimate of the campaign: seconds per scenario from its grid and training budget.

    About 12 s of fixed work per scenario (start-up, figures, briefing) plus a share
    that grows with usable cells x headings x training runs x training budget; set from
    one measurement (benchmarks/bench_campaign.py, 1 worker: about 15 s per drone-range
    scenario at 8 m cells, on a loaded 2-core machine). A guide for planning the day, not
    a promise: on a busy machine expect longer.
    """
    total = 0.0
    for job in plan.jobs:
        cells = plan.usable_cells(job)
        learn = job.settings.learn
        total += 12.0 + 2.0e-6 * cells * job.settings.dynamics.n_actions * learn.n_seeds * (
            1 + learn.max_sweeps / 8 + learn.episodes / 2000)
    return total / max(1, min(n_workers, len(plan.jobs)))


@cli.command(cls=SectionedCommand)
@click.argument("campaign_file", metavar="FILE", type=click.Path(dir_okay=False, path_type=str))
@click.option("--out", "out_dir", required=True, metavar="DIR", type=click.Path(file_okay=False, path_type=str),
              help="Folder of the campaign: one run folder per scenario under DIR/runs, the scenario site files "
                   "under DIR/sites, and campaign.csv, campaign.json, campaign.png and campaign.html. Rerunning "
                   "into the same DIR skips the scenarios already finished.")
@click.option("--scheduler", default=None, metavar="ADDRESS",
              help="Run on the Dask scheduler at ADDRESS (e.g. tcp://10.0.0.5:8786) instead of a local cluster.")
@click.option("--workers", "n_workers", type=click.IntRange(1, 1024), default=None, metavar="N",
              show_default="the cores this process may use",
              help="Worker processes of the local cluster (one thread each).")
@click.option("--check", "check_only", is_flag=True,
              help="Check the campaign file and show the scenarios and the time estimate; run and write nothing.")
@click.option("--quiet", "-q", is_flag=True, help="No progress display.")
def campaign(campaign_file, out_dir, scheduler, n_workers, check_only, quiet):
    """Run every scenario of the campaign FILE and write one table, one figure and one briefing.

    FILE (TOML) names a site and the scenario axes: start/goal pairs, vehicles and
    drift cases (see DEVELOPERS.md, "Campaign files"); every combination is one plan,
    or only the listed ones with expand = "list". Everything is checked before any
    work starts. Each scenario is a plan of its own run folder, seeded from the
    campaign seed and the scenario's identity, so the results are the same on any
    number of workers. Scenarios run on a local Dask cluster, or on a running Dask
    scheduler with --scheduler. A scenario that fails is reported and the rest go on;
    the exit code is 4 when not every scenario succeeded.

    For simulation and review only: not approved for field operation.

    \b
    Examples:
      veerwise campaign examples/drone-day.toml --out day-1
      veerwise campaign day.toml --out day-1 --workers 4
      veerwise campaign day.toml --out day-1 --scheduler tcp://10.0.0.5:8786
    """
    from planner.campaign_jobs import make_client, run_jobs
    from planner.campaign_report import outcome_line, write_report
    from planner.errors import Interrupted
    from planner.progress import Progress
    from planner.transactions import run_lock

    started = time.perf_counter()
    out = Path(out_dir)
    plan = checked_plan(campaign_file)
    spec = plan.campaign
    check_out_dir(out)
    import os

    local_workers = n_workers or len(os.sched_getaffinity(0))
    estimate = estimate_s(plan, local_workers)
    sharing = len(plan.prepared)
    click.echo(f"campaign {spec.path}: {len(plan.jobs)} scenarios ({len(spec.pairs)} pairs x "
               f"{len(spec.vehicles)} vehicles x {len(spec.drifts)} drift cases"
               + (", listed" if len(plan.jobs) != len(spec.pairs) * len(spec.vehicles) * len(spec.drifts) else "")
               + f"), {sharing} shared grid{'s' if sharing != 1 else ''}; rough estimate "
               f"{_duration(estimate)} on {'the cluster' if scheduler else f'{local_workers} local workers'}",
               err=True)
    if check_only:
        return
    client = make_client(scheduler=scheduler, n_workers=n_workers)
    try:
        out.mkdir(exist_ok=True)
        console = progress_console(quiet)
        with run_lock(out), Progress(console) as progress:
            link = dashboard_link(client, local=scheduler is None)
            if link:
                progress(f"Dask dashboard: {link}")
                if console is None and not quiet:
                    click.echo(f"Dask dashboard: {link}", err=True)
            done = [0]
            with progress.task(f"scenarios ({len(plan.jobs)})", len(plan.jobs)) as report:
                def on_outcome(job, outcome):
                    done[0] += 1
                    report(done[0])
                    line = outcome_line(job, outcome, done[0], len(plan.jobs))
                    if console is not None:
                        progress(line)
                    elif not quiet:
                        click.echo(line, err=True)

                try:
                    result = run_jobs(client, plan, out, on_outcome=on_outcome)
                except KeyboardInterrupt as err:
                    raise Interrupted(f"stopped; the scenarios finished so far keep their run folders in {out} "
                                      "and a rerun into it resumes") from err
            paths = write_report(plan, result, out)
    finally:
        cluster = getattr(client, "cluster", None)
        client.close()
        if cluster is not None and scheduler is None:
            cluster.close()
    failed = [o for o in result.outcomes if o["status"] == "failed"]
    counts = {k: sum(o["status"] == k for o in result.outcomes) for k in ("done", "skipped", "failed")}
    click.echo(f"{len(plan.jobs)} scenarios: {counts['done']} run, {counts['skipped']} already finished "
               f"(skipped), {counts['failed']} failed; {result.n_workers} workers, "
               f"{time.perf_counter() - started:.1f} s")
    for path in paths:
        click.echo(f"wrote {path}")
    click.echo("For simulation and review only; not approved for field operation.")
    if failed:
        raise click.exceptions.Exit(EXIT_SOME_FAILED)


def dashboard_link(client, *, local: bool) -> str | None:
    """The Dask dashboard's address, or None: a local cluster serves one only when bokeh is installed."""
    import importlib.util

    if local and importlib.util.find_spec("bokeh") is None:
        return None
    try:
        return client.dashboard_link or None
    except (AttributeError, KeyError, ValueError):
        return None


def _duration(seconds: float) -> str:
    if not math.isfinite(seconds):
        return "unknown"
    return f"{seconds / 60:.0f} min" if seconds >= 120 else f"{seconds:.0f} s"
