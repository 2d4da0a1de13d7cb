"""The run folder: written whole or not at all, and checked before it is read.

This stage owns the ``plan`` pipeline end to end (site -> grid -> model -> learners
and exact references -> risk -> routes -> files), the manifest (inputs with hashes,
every setting, seeds, versions, and the hash of every file written) and loading a run
back with those checks. Locking and the atomic replacement of a folder are
:mod:`planner.transactions`.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import math
import os
import platform
import shutil
import stat
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from planner import __version__
from planner.budget_plan import ROUTE_NAME
from planner.errors import RunFolderError, SettingsError
from planner.export import RUN_FORMAT
from planner.settings import (
    MAX_SEED,
    PlanSettings,
    check_plan_size,
    check_seed,
    settings_from_record,
    settings_record,
)
from planner.transactions import (  # the storage transactions, used here and by the commands
    atomic_folder,
    run_lock,
)

#: What the manifest says it is (``RUN_FORMAT``, from the export stage's file helpers);
#: a run folder without it is refused.
#: Version of the run-folder layout; newer folders are refused by older code.
RUN_FORMAT_VERSION = 1
#: Arrays stored in ``policies.npz`` and their dtypes (checked on load).
POLICY_ARRAYS = {
    "greedy_cautious": "int64", "greedy_shortest": "int64",
    "greedy_exact_on_policy": "int64", "greedy_exact_optimal": "int64",
    "q_cautious": "float64", "q_shortest": "float64",
    "q_exact_on_policy": "float64", "q_exact_optimal": "float64",
}
POLICIES = ("cautious", "shortest")
#: The third route, delivered with ``--risk-budget``.
ROUTE_BUDGET = ROUTE_NAME
#: Arrays ``policies.npz`` holds only for some runs (checked like the others when present).
OPTIONAL_POLICY_ARRAYS = {f"greedy_{ROUTE_BUDGET}": "int64"}
#: Actions within this many cells (metres-equivalent / cell size) of the exact best
#: count as agreeing: a detour below the grid's resolution is no disagreement.
TIE_CELLS = 0.25
#: A learned policy within this share of the exact value at the start (or one cell)
#: counts as converged on value.
GAP_SHARE = 0.01


def versions() -> dict:
    """Versions of Python, veerwise and every library a result depends on."""
    from importlib.metadata import version

    import pyproj

    out = {"veerwise": __version__, "python": platform.python_version()}
    for name in ("numpy", "scipy", "shapely", "pyproj", "numba", "matplotlib", "click"):
        out[name] = version(name)
    out["proj"] = pyproj.proj_version_str
    out["platform"] = platform.platform()
    return out


def sha256_file(path) -> str:
    """SHA-256 of a file's bytes, as hex."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


# ----------------------------------------------------------------------------- the pipeline


def _ignore(*_args) -> None:
    """A progress report nobody watches."""


class Progress:
    """What a plan is doing and how far it is, for a person watching a terminal.

    With a ``rich.console.Console`` it draws one line per stage (what, a bar, the share
    done, the time taken) and prints notes above them; without one (``-q``, or output
    that is not a terminal) every call does nothing, so scripts and logs get only the
    command's own output. Use it as a context manager around the work it reports on.

    Parameters
    ----------
    console : rich.console.Console or None
        Where to draw; None for no display.
    """

    def __init__(self, console=None):
        self.started = time.perf_counter()
        self._bars = None
        if console is not None:
            from rich.progress import BarColumn, TaskProgressColumn, TextColumn, TimeElapsedColumn
            from rich.progress import Progress as Bars

            # every line starts with the time into the run at which its stage began
            self._bars = Bars(TextColumn("[{task.fields[at]:6.1f} s]", markup=False),
                              TextColumn("{task.description}", markup=False), BarColumn(bar_width=24),
                              TaskProgressColumn(), TimeElapsedColumn(), console=console, redirect_stdout=False,
                              redirect_stderr=False)

    def __enter__(self) -> Progress:
        if self._bars is not None:
            self._bars.start()
        return self

    def __exit__(self, *exc) -> None:
        if self._bars is not None:
            self._bars.stop()

    def elapsed_s(self) -> float:
        """Seconds since the run began."""
        return time.perf_counter() - self.started

    def __call__(self, message: str) -> None:
        """A note above the bars: a fact worth seeing while the run goes on."""
        if self._bars is not None:
            self._bars.console.print(f"[{self.elapsed_s():6.1f} s] {message}", markup=False, highlight=False,
                                     soft_wrap=True)

    @contextlib.contextmanager
    def task(self, what: str, total: int | None = None):
        """A stage of the run, shown while it works; yields ``report(done, total=None)``.

        A stage without a ``total`` shows a moving bar until it ends. A stage that ends
        with an exception is left where it stopped.
        """
        if self._bars is None:
            yield _ignore
            return
        bars = self._bars
        task_id = bars.add_task(what, total=total, at=self.elapsed_s())

        def report(done, new_total=None) -> None:
            bars.update(task_id, completed=done, total=new_total if new_total is not None else bars.tasks[
                task_id].total)

        yield report
        done = bars.tasks[task_id].total or 1
        bars.update(task_id, total=done, completed=done)


@dataclass(frozen=True)
class PlanResult:
    """What ``plan`` computed, kept for the summary and the files."""

    site: object
    grid: object
    model: object
    learned: dict
    exact: dict
    greedy: dict
    convergence: dict
    #: ``planner.exact.SafestChoice`` per policy: the exact references with ties broken
    #: by safety, and the range of P(incident) over their ties.
    references: dict
    paths: dict
    routes: dict
    risk_rows: list
    root_seed: object
    timings: dict
    #: policy name -> exact P(incident) of each training seed's own policy at the
    #: headline noise and planning drift (the range the summary and briefing report)
    seed_p_incident: dict = field(default_factory=dict)
    #: policy name -> (drift scale, the same per-seed figures at the table's strongest drift)
    seed_p_incident_strong: dict = field(default_factory=dict)
    #: the half-cell check of each delivered policy (``planner.gridcheck.GridCheck``)
    grid_checks: list = field(default_factory=list)
    #: ``--risk-budget``: the budget search (``planner.budget_plan.BudgetPlan``) and its
    #: record (``budget_plan.budget_record``); None without a budget
    budget: object = None
    budget_record: dict | None = None
    #: route name -> where its P(incident) comes from (``budget_plan.explain_route``)
    causes: dict = field(default_factory=dict)


def check_drift_scales(grid, dynamics, option: str, scales) -> None:
    """Refuse, naming ``option``, any drift scale that would push a vehicle across the whole grid."""
    from planner.motion import landing_tables

    for scale in scales:
        try:
            landing_tables(grid, dynamics, scale)
        except SettingsError as err:
            raise SettingsError(f"{option} {scale:g}: {err}") from err


def budget_moves(settings_dynamics, cell_m: float, budget_m: float | None) -> int | None:
    """The whole moves a travel budget in metres allows, refusing one shorter than a move."""
    from planner.motion import moves_within

    if budget_m is None:
        return None
    move = settings_dynamics.move_length_m(cell_m)
    moves = moves_within(budget_m, move)
    if moves < 1:
        raise SettingsError(f"--budget-m {budget_m:g} m is shorter than one move ({move:g} m)")
    return moves


def compute_plan(site_path, settings: PlanSettings, progress: Progress | None = None, *, site=None,
                 grid=None) -> PlanResult:
    """Run every stage of ``plan`` in memory (no files written).

    ``site`` and ``grid``, when the caller has already loaded and rasterised
    ``site_path`` with these settings, are used instead of doing it again.
    """
    from planner.exact import on_policy_q, optimal_q
    from planner.gis import load_sites
    from planner.grid import cost_to_goal, rasterise
    from planner.learn import SARSA_SWEEP_HORIZON, learned_ties, train
    from planner.model import build_model
    from planner.route import nominal_path
    from planner.ties import check_tie_tolerance, equally_good, safest_among
    from planner.verdict import convergence_report, risk_verdict

    progress = progress or Progress()
    timings = {}
    t = time.perf_counter()
    if site is None:
        site = load_sites(site_path, crs=settings.crs, fix=settings.fix, max_bytes=settings.max_bytes)
    if grid is None:
        grid = rasterise(site, settings.grid)
    progress(f"grid {grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m")
    # Every drift scale of the risk table must make a model: find out before training.
    check_drift_scales(grid, settings.dynamics, "--plan-drift", (settings.dynamics.drift_scale,))
    check_drift_scales(grid, settings.dynamics, "--table-drifts", settings.drift_scales)
    budget_moves(settings.dynamics, grid.cell_m, settings.budget_m)
    check_plan_size(grid, settings)
    with progress.task("building the model"):
        model = build_model(grid, settings.dynamics)
    timings["model_s"] = time.perf_counter() - t
    progress(f"model: {model.n_outcomes:,} outcomes ({model.nbytes / 2**20:.1f} MiB)")

    root = np.random.SeedSequence(settings.seed)
    seed_cautious, seed_shortest, seed_risk = root.spawn(3)
    to_go = cost_to_goal(grid, settings.dynamics.n_actions,
                         hazard_penalty_m=model.penalty_m, unit_cost=settings.dynamics.step_cost == "move")
    eps = settings.learn.epsilon
    t = time.perf_counter()
    # The exact references come first: the sweeps schedule stops on the risk verdict
    # against them.
    with progress.task("exact references (value iteration)", 2) as report:
        exact = {"cautious": on_policy_q(model, eps)}
        report(1)
        exact["shortest"] = optimal_q(model)
    # Ties by safety: among equally good actions, the one that minimises P(incident) at
    # the run's noise; the riskiest tie-break gives the other end of the range.
    check_tie_tolerance(model, settings.tie_m, "--tie-m")
    references = {}
    with progress.task("ties broken by safety (exact references)", len(POLICIES)) as report:
        for k, name in enumerate(POLICIES):
            references[name] = safest_among(model, equally_good(exact[name].q, settings.tie_m), eps,
                                            value=exact[name].q)
            report(k + 1)
    timings["exact_s"] = time.perf_counter() - t
    budget_plan = None
    if settings.risk_budget is not None:
        from planner.budget_plan import plan_budget

        t = time.perf_counter()
        with progress.task(f"risk budget {settings.risk_budget:g}: exact solves over the hazard penalty"):
            budget_plan = plan_budget(model, eps, settings.risk_budget, tie_m=settings.tie_m,
                                      drift_scale=settings.dynamics.drift_scale, set_by=settings.budget_set_by,
                                      warm=exact["cautious"].v)
        progress(f"risk budget: {budget_plan.n_solves_budget} exact solves for the route, "
                 f"{budget_plan.n_solves_curve} more for the trade-off curve ({len(budget_plan.curve)} points)")
        timings["budget_s"] = time.perf_counter() - t
    cheapest_m = float(-model.reward[model.event == 0].max())
    # The seeds' spread may widen a learned tie set by at most LEARNED_SLACK_SHARE of the
    # cheapest move: wider sets of a barely trained Q let the safety rule pick moves that
    # go round in loops.
    slack_m = settings.tie_m + LEARNED_SLACK_SHARE * cheapest_m

    def delivered(q):
        """The consensus policy of per-seed Q ``q``: the safest among its learned ties."""
        return safest_among(model, learned_ties(q, settings.tie_m, max_slack_m=slack_m), eps, value=q.mean(axis=0),
                            riskiest=False).greedy

    def stop_rule(name):
        def rule(_mean, q):
            verdict = risk_verdict(model, delivered(q), references[name])
            return verdict.converged, verdict.p_incident
        return rule

    # SARSA's sampled next action makes its targets far noisier than Q-learning's: in
    # sweeps it keeps larger steps for longer (see planner.learn.SARSA_SWEEP_HORIZON).
    learn_cautious = dataclasses.replace(
        settings.learn, schedule=settings.cautious_schedule,
        sweep_horizon=SARSA_SWEEP_HORIZON if settings.learn.sweep_horizon is None else settings.learn.sweep_horizon)
    learn_shortest = dataclasses.replace(
        settings.learn, schedule=settings.shortest_schedule,
        episodes=settings.learn.episodes if settings.episodes_shortest is None else settings.episodes_shortest)
    t = time.perf_counter()
    learned = {}
    for name, method, how, seed in (("cautious", "sarsa", learn_cautious, seed_cautious),
                                    ("shortest", "qlearning", learn_shortest, seed_shortest)):
        label = METHOD_NAMES[method]
        budget = (f"up to {how.max_sweeps:,} sweeps, stopping when its risk verdict passes"
                  if how.schedule == "sweeps" else f"{how.episodes:,} episodes")
        progress(f"training {label} ({name}): {how.n_seeds} seeds x {budget}")
        with progress.task(f"{label} ({name})") as report:
            learned[name] = train(model, method, how, seed=seed, cost_to_go=to_go, progress=report,
                                  stop_rule=stop_rule(name) if how.schedule == "sweeps" else None)
    timings["learn_s"] = time.perf_counter() - t
    greedy = {name: delivered(learned[name].q) for name in POLICIES}
    seed_greedy = {name: [safest_among(model, equally_good(q, settings.tie_m), eps, value=q, riskiest=False).greedy
                          for q in learned[name].q] for name in POLICIES}
    tie_m = TIE_CELLS * grid.cell_m
    convergence = {
        name: convergence_report(model, learned[name], exact[name], eps if name == "cautious" else 0.0,
                                 threshold=settings.convergence_threshold, tie_m=tie_m,
                                 gap_limit_m=max(grid.cell_m, GAP_SHARE * abs(float(exact[name].v[model.start]))),
                                 greedy=greedy[name], seed_greedy=seed_greedy[name])
        for name in POLICIES
    }
    if budget_plan is not None:
        greedy[ROUTE_BUDGET] = budget_plan.greedy
    paths = {name: nominal_path(model, greedy[name]) for name in greedy}
    routes = _routes(site, grid, model, paths)
    from planner.risk import seed_incidents

    seed_p_incident = {name: seed_incidents(model, seed_greedy[name], eps) for name in POLICIES}
    # the same at the strongest drift of the table, for the briefing's stronger-wind figures
    base = settings.dynamics.drift_scale
    strong = max(settings.drift_scales, default=base)
    seed_p_incident_strong = {}
    if strong > base and not np.isclose(strong, base):
        windy = build_model(grid, dataclasses.replace(settings.dynamics, drift_scale=float(strong)))
        seed_p_incident_strong = {name: (float(strong), seed_incidents(windy, seed_greedy[name], eps))
                                  for name in POLICIES}
    t = time.perf_counter()
    risk_rows = _risk(site, grid, settings, model, greedy, references, seed_risk, progress)
    timings["risk_s"] = time.perf_counter() - t
    from planner.risk import find_row, format_prob

    base = float(settings.dynamics.drift_scale)
    # Verdicts on risk: a learned policy is converged only when its own exact P(incident)
    # lies in its reference's tie range (widened) and its length is within 1 %.
    for name in POLICIES:
        verdict = risk_verdict(model, greedy[name], references[name], seed_p_incident=seed_p_incident[name],
                               mc_halfwidth=_mc_halfwidth(find_row(risk_rows, name, eps, base)), fmt=format_prob)
        convergence[name] = convergence[name].judged_by(verdict, **_training_notes(learned[name]))
    risk_rows = _with_verdicts(risk_rows, convergence, references, eps, base)
    t = time.perf_counter()
    risk_rows, checks = _grid_check(site, grid, settings, model, greedy, risk_rows, progress)
    timings["grid_check_s"] = time.perf_counter() - t
    causes, record = {}, None
    if budget_plan is not None:
        from planner.budget_plan import budget_record, explain_route

        t = time.perf_counter()
        with progress.task("why each route is risky (leg shares, failure paths)", len(routes)) as report:
            for k, name in enumerate(routes):
                causes[name] = explain_route(model, grid, routes[name], paths[name], greedy[name], eps)
                report(k + 1)
        record = budget_record(budget_plan, {n: (routes[n], find_row(risk_rows, n, eps, base).p_incident)
                                             for n in routes})
        timings["causes_s"] = time.perf_counter() - t
    return PlanResult(site=site, grid=grid, model=model, learned=learned, exact=exact, greedy=greedy,
                      convergence=convergence, references=references, paths=paths, routes=routes,
                      risk_rows=risk_rows, root_seed=root, timings=timings, seed_p_incident=seed_p_incident,
                      seed_p_incident_strong=seed_p_incident_strong, grid_checks=checks, budget=budget_plan,
                      budget_record=record, causes=causes)


#: Largest widening of a learned tie set by the seeds' spread, as a share of the cheapest move.
LEARNED_SLACK_SHARE = 0.05
#: Reference rows of the risk table, by the learned policy they judge.
REFERENCE_ROWS = {"cautious": "exact on-policy", "shortest": "exact optimal"}
def _training_notes(learned) -> dict:
    """What a learner's training took, when its verdict turned converged, and what to try when it did not."""
    from planner.learn import FIRST_CHECK_SWEEPS

    how = learned.settings
    if how.schedule == "sweeps":
        used = (f"{learned.steps_total:.2e} updates in {learned.n_sweeps:,} sweeps; "
                + (f"its verdict turned converged at the check after {learned.n_sweeps:,} sweeps, where training "
                   "stopped" if learned.stopped_by_rule else
                   f"its verdict was not converged at any check ({len(learned.check_updates)} checks from "
                   f"{FIRST_CHECK_SWEEPS:,} to {learned.n_sweeps:,} sweeps)"))
        return {"used": used, "advice": f"try --max-sweeps {4 * how.max_sweeps}"}
    return {"used": f"{learned.steps_total:.2e} updates ({how.episodes:,} episodes per seed)",
            "advice": f"try --episodes {4 * how.episodes}"}


def _mc_halfwidth(row) -> float:
    """Half-width of the Clopper-Pearson 99 % interval of a row's Monte Carlo P(incident)."""
    from planner.gridcheck import mc_halfwidth

    return mc_halfwidth(row)


def _with_verdicts(rows, convergence, references, eps: float, base: float) -> list:
    """Risk rows that say what each policy is.

    A learned one with its verdict, or an exact reference with its tie range at the
    run's noise.
    """
    out = []
    by_reference = {ref: name for name, ref in REFERENCE_ROWS.items()}
    for row in rows:
        if row.policy in convergence:
            row = dataclasses.replace(row, verdict="converged" if convergence[row.policy].converged
                                      else "not converged")
        elif row.policy in by_reference:
            choice = references[by_reference[row.policy]]
            at_run_noise = row.noise == eps and row.drift_scale == base
            row = dataclasses.replace(row, verdict="exact reference (ties by safety)", p_incident_range=(
                (choice.p_incident, choice.p_incident_max) if at_run_noise else None))
        elif row.policy == ROUTE_BUDGET:
            row = dataclasses.replace(row, verdict="exact, shortest within the risk budget (ties by safety)")
        out.append(row)
    return out


def _grid_check(site, grid, settings, model, greedy, rows, progress):
    """The half-cell check of the delivered policies, attached to their risk rows."""
    from planner.gridcheck import GridCheck, half_cell_check
    from planner.risk import find_row

    eps = settings.learn.epsilon
    delivered = {name: greedy[name] for name in (*POLICIES, ROUTE_BUDGET) if name in greedy}
    if settings.grid_check:
        finer = f"{grid.cell_m / 2:g} m" + (f" and {grid.cell_m / 4:g} m" if settings.grid_levels == 3 else "")
        progress(f"grid check: the {len(delivered)} delivered policies re-evaluated at {finer} cells")
        checks = half_cell_check(site, grid, settings.grid, settings.dynamics, model, delivered, rows, noise=eps,
                                 levels=settings.grid_levels)
    else:
        checks = []
        for name in delivered:
            row = find_row(rows, name, eps, settings.dynamics.drift_scale)
            checks.append(GridCheck(policy=name, noise=eps, cell_m=grid.cell_m, fine_cell_m=grid.cell_m / 2,
                                    p_incident=row.p_incident, skipped="switched off (--no-grid-check)"))
    by_name = {c.policy: c for c in checks}
    out = []
    for row in rows:
        check = by_name.get(row.policy)
        if check is not None and row.noise == eps and row.drift_scale == settings.dynamics.drift_scale:
            row = dataclasses.replace(row, grid_check=check.as_dict())
        out.append(row)
    return out, checks


def _routes(site, grid, model, paths) -> dict:
    from planner.route import build_route

    return {name: build_route(name, paths[name], grid, site, model) for name in paths}


def _risk(site, grid, settings, model, greedy, references, seed, progress) -> list:
    from planner.risk import sensitivity

    policies = {
        "cautious": greedy["cautious"], "shortest": greedy["shortest"],
        "exact on-policy": references["cautious"].greedy,
        "exact optimal": references["shortest"].greedy,
        **({ROUTE_BUDGET: greedy[ROUTE_BUDGET]} if ROUTE_BUDGET in greedy else {}),
    }
    n_rows = len(policies) * len(settings.noises) * len(settings.drift_scales)
    progress(f"risk table: {len(policies)} policies x {len(settings.noises)} noise levels x "
             f"{len(settings.drift_scales)} drift scales, {settings.rollouts:,} rollouts per row")
    budget = budget_moves(settings.dynamics, grid.cell_m, settings.budget_m)
    with progress.task("risk table (rows)", n_rows) as report:
        return sensitivity(grid, settings.dynamics, policies, noises=settings.noises,
                           drift_scales=settings.drift_scales, budget=budget, rollouts=settings.rollouts,
                           seed=seed, model=model, progress=report,
                           flag_z=table_z(grid, len(policies), settings.noises, settings.drift_scales, budget))


def table_z(grid, n_policies: int, noises, drift_scales, budget) -> float:
    """Flag level of a risk table: its Monte Carlo checks kept at 95% together."""
    from planner.risk import table_flag_z

    per_row = 3 + 1 + len(grid.hazards) + (3 if budget is not None else 0)
    return table_flag_z(n_policies * len(noises) * len(drift_scales) * per_row)


# ----------------------------------------------------------------------------- writing


def write_run(result: PlanResult, settings: PlanSettings, site_path, out, *, force: bool = False,
              progress: Progress | None = None) -> Path:
    """Write the run folder of ``result`` to ``out``, whole or not at all."""
    progress = progress or Progress()
    out = Path(out)
    with atomic_folder(out, force=force) as tmp:
        _write_contents(result, settings, site_path, tmp, progress, out.name)
    return out


def _write_contents(result: PlanResult, settings: PlanSettings, site_path, folder: Path, progress,
                    run_name: str) -> None:
    from planner import plots
    from planner.brief import BriefInputs, write_brief
    from planner.export import write_csv, write_geojson
    from planner.risk import risk_map
    from planner.risk_table import format_table

    # The bytes that were hashed and parsed, not the file again: it may have changed since.
    data = result.site.data
    if not data:
        raise RunFolderError(f"{result.site.source}: the site was not read from a file, so there are no bytes to "
                             "copy into the run folder; load it with planner.site.load_site")
    if hashlib.sha256(data).hexdigest() != result.site.sha256:
        raise RunFolderError(f"{site_paths_text(site_path)}: the site's bytes in memory do not match its hash; "
                             "nothing was written")
    (folder / "site.geojson").write_bytes(data)
    arrays = {
        "greedy_cautious": result.greedy["cautious"].astype(np.int64),
        "greedy_shortest": result.greedy["shortest"].astype(np.int64),
        "greedy_exact_on_policy": result.references["cautious"].greedy.astype(np.int64),
        "greedy_exact_optimal": result.references["shortest"].greedy.astype(np.int64),
        "q_cautious": result.learned["cautious"].q_mean, "q_shortest": result.learned["shortest"].q_mean,
        "q_exact_on_policy": result.exact["cautious"].q, "q_exact_optimal": result.exact["shortest"].q,
    }
    if ROUTE_BUDGET in result.greedy:
        arrays[f"greedy_{ROUTE_BUDGET}"] = result.greedy[ROUTE_BUDGET].astype(np.int64)
    _save_npz(folder / "policies.npz", arrays)
    from planner.learn import learning_curves

    _save_npz(folder / "training.npz", {
        f"{name}_{key}": value for name in POLICIES for key, value in learning_curves(result.learned[name]).items()
    })
    progress("writing waypoint files and the risk table")
    for name in result.routes:
        write_geojson(result.routes[name], folder / f"routes-{name}.geojson", site=result.site, alt_m=settings.alt_m)
        write_csv(result.routes[name], folder / f"waypoints-{name}.csv", alt_m=settings.alt_m)
    (folder / "risk.csv").write_text(format_table(result.risk_rows, "csv"))
    noise = settings.learn.epsilon
    if result.budget is None:
        (folder / "risk.json").write_text(format_table(result.risk_rows, "json"))
    else:
        from planner.budget_plan import risk_records

        records = risk_records(result.risk_rows, noise=noise, drift_scale=settings.dynamics.drift_scale,
                               budget=result.budget_record, causes=result.causes)
        (folder / "risk.json").write_text(json.dumps(records, sort_keys=True, indent=2, allow_nan=False) + "\n")
    with progress.task("figures", 4 if result.budget is None else 6) as report:
        plots.plot_learning(result.learned, folder / "learning.png",
                            title=f"{result.site.name} - learning curves")
        report(1)
        plots.plot_routes(result.site, result.grid, result.routes, folder / "routes.png")
        report(2)
        maps = {}
        from planner.model import epsilon_greedy

        for name in result.routes:
            probs = epsilon_greedy(result.greedy[name], result.model.n_actions, noise)
            maps[name] = risk_map(result.model, probs)
        plots.plot_risk_maps(result.site, result.grid, maps, result.routes, folder / "riskmap.png", noise=noise)
        report(3)
        plots.plot_sensitivity(result.risk_rows, folder / "sensitivity.png",
                               title=f"{result.site.name} - incident probability under worse execution and wind")
        if result.budget is not None:
            from planner import plots_budget

            report(4)
            plots_budget.plot_tradeoff(result.budget_record, result.causes, folder / "tradeoff.png",
                                       title=f"{result.site.name} - length against risk")
            report(5)
            plots_budget.plot_causes(result.site, result.grid, result.routes, result.causes,
                                     folder / "failure-paths.png")
    manifest = build_manifest(result, settings, site_path, folder)
    # the run id covers every file but the briefing, which prints it
    manifest["files"] = file_hashes(folder)
    manifest["run_id"] = run_identity(manifest)
    with progress.task("briefing (HTML, then PDF)"):
        write_brief(BriefInputs(folder=folder, site=result.site, grid=result.grid, routes=result.routes,
                                risk_rows=result.risk_rows, settings=settings, manifest=manifest, run_name=run_name,
                                budget=result.budget_record, causes=result.causes),
                    folder / "brief.html", folder / "brief.pdf")
    write_manifest(folder, manifest)


#: Files the run id does not cover: the briefing prints the id, so it cannot be hashed into it.
RUN_ID_OMITS_FILES = ("brief.html", "brief.pdf")
#: Manifest entries the run id does not cover: when and how fast a run was made, not what it holds.
RUN_ID_OMITS_KEYS = ("run_id", "created_utc", "timings_s")


def run_identity(manifest: dict) -> str:
    """The run id: 12 hex digits of SHA-256 over the manifest as canonical JSON.

    The manifest is hashed without ``run_id`` itself, the clock entries
    (``created_utc``, ``timings_s``) and the hashes of ``brief.html`` / ``brief.pdf``
    (which print the id), so it is known when the briefing is written, covers the
    inputs, settings, seeds, versions and the hash of every result file, and is the
    same for two runs that hold the same results. ``veerwise brief`` re-renders a
    briefing with the same id.
    """
    kept = {k: v for k, v in manifest.items() if k not in RUN_ID_OMITS_KEYS}
    kept["files"] = {k: v for k, v in manifest.get("files", {}).items() if k not in RUN_ID_OMITS_FILES}
    canonical = json.dumps(kept, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(canonical.encode("ascii")).hexdigest()[:12]


def file_hashes(folder: Path) -> dict:
    """SHA-256 of every file of a run folder (not the manifest, not hidden files), by name."""
    return {p.name: sha256_file(p) for p in sorted(Path(folder).iterdir())
            if p.is_file() and not p.is_symlink() and p.name != "manifest.json" and not p.name.startswith(".")}


def write_manifest(folder: Path, manifest: dict) -> None:
    """Record the hash of every file in the folder, then write ``manifest.json`` atomically."""
    from planner.export import atomic_output

    manifest["files"] = file_hashes(folder)
    with atomic_output(folder / "manifest.json", guard=False) as tmp:
        tmp.write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n")


def _save_npz(path: Path, arrays: dict) -> None:
    """Deterministic .npz: fixed member order and time stamps, so equal arrays give equal bytes."""
    import io
    import zipfile

    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for name in sorted(arrays):
            buf = io.BytesIO()
            np.lib.format.write_array(buf, np.ascontiguousarray(arrays[name]), allow_pickle=False)
            info = zipfile.ZipInfo(f"{name}.npy", date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            zf.writestr(info, buf.getvalue())


#: How the manifest and the files name each learner.
METHOD_NAMES = {"sarsa": "SARSA", "qlearning": "Q-learning"}


def _verdict_record(verdict, reference) -> dict | None:
    """The risk verdict and the reference's tie range, as plain data for the manifest."""
    if verdict is None:
        return None

    def num(x):
        return None if not np.isfinite(x) else float(x)

    return {
        "converged": bool(verdict.converged), "p_incident": num(verdict.p_incident),
        "reference_p_incident": num(verdict.reference_low), "reference_p_incident_max": num(verdict.reference_high),
        "band": [num(verdict.band_low), num(verdict.band_high)],
        "expected_length_m": num(verdict.length_m), "reference_expected_length_m": num(verdict.reference_length_m),
        "seeds_p_incident": [num(verdict.seeds_low), num(verdict.seeds_high)],
        "tied_states": int(reference.n_tied_states), "message": verdict.message,
    }


def site_paths_text(site_path) -> str:
    """The site file, or the files merged into the site (joined by ' + '), as the manifest names them."""
    if isinstance(site_path, (str, Path)):
        return str(site_path)
    return " + ".join(str(p) for p in site_path)


def build_manifest(result: PlanResult, settings: PlanSettings, site_path, folder: Path) -> dict:
    """The manifest: inputs with hashes, settings, seeds, versions, results in brief."""
    root = result.root_seed
    summary = {}
    for name in POLICIES:
        route, conv = result.routes[name], result.convergence[name]
        learned = result.learned[name]
        summary[name] = {
            "method": learned.method, "reached_goal": route.reached_goal, "moves": route.n_moves,
            "length_m": round(route.length_m, 3), "waypoints": len(route.waypoints),
            "converged": conv.converged, "agreement": round(conv.agreement, 6),
            "value_gap_m": None if not np.isfinite(conv.value_gap_m) else round(conv.value_gap_m, 6),
            "seed_routes_matching": conv.seed_routes_matching, "n_seeds": conv.n_seeds, "message": conv.message,
            "episodes": learned.settings.episodes, "max_steps": learned.max_steps,
            "schedule": learned.settings.schedule, "updates": int(learned.steps_total),
            "sweep_horizon": learned.settings.sweep_horizon,
            "sweeps": int(learned.n_sweeps), "stopped_by_rule": bool(learned.stopped_by_rule),
            "checks": {"updates": [int(u) for u in learned.check_updates],
                       "p_incident": [None if not np.isfinite(p) else float(p) for p in learned.check_p_incident]},
            "delivered": f"learned ({METHOD_NAMES[learned.method]}), "
                         f"{'converged' if conv.converged else 'not converged'}",
            "verdict": _verdict_record(conv.verdict, result.references[name]),
            "p_incident_seeds": [float(p) for p in result.seed_p_incident.get(name, ())],
            **({"p_incident_seeds_strong": {"drift_scale": result.seed_p_incident_strong[name][0],
                                            "values": [float(p) for p in result.seed_p_incident_strong[name][1]]}}
               if name in result.seed_p_incident_strong else {}),
        }
    exact = {name: {"iterations": sol.iterations, "residual": sol.residual, "epsilon": sol.epsilon}
             for name, sol in result.exact.items()}
    return {
        "format": RUN_FORMAT,
        "format_version": RUN_FORMAT_VERSION,
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "notice": "For simulation and review only; not approved for field operation. Follow the site's safety "
                  "rules, certified operators and local regulations.",
        "input": {"site": site_paths_text(site_path), "site_copy": "site.geojson", "sha256": result.site.sha256,
                  "name": result.site.name,
                  "files": [{"path": path, "sha256": digest} for path, digest in result.site.inputs]},
        "settings": settings_record(settings),
        "seeds": {"entropy": str(root.entropy), "spawn": {"cautious": 0, "shortest": 1, "risk": 2},
                  "given": settings.seed},
        "versions": versions(),
        "grid": {"rows": result.grid.shape[0], "cols": result.grid.shape[1], "cell_m": result.grid.cell_m,
                 "x0": result.grid.x0, "y0": result.grid.y0, "crs": result.site.frame.crs},
        "motion": {"cell_m": result.grid.cell_m, "move_m": settings.dynamics.move_length_m(result.grid.cell_m),
                   "headings": settings.dynamics.n_actions,
                   "budget_moves": budget_moves(settings.dynamics, result.grid.cell_m, settings.budget_m)},
        "grid_check": [c.as_dict() for c in result.grid_checks],
        "model": {"outcomes": result.model.n_outcomes, "bytes": result.model.nbytes,
                  "hazard_penalty_m": [float(p) for p in result.model.penalty_m],
                  "boundary_penalty_m": result.model.boundary_penalty_m, "warnings": list(result.model.warnings)},
        "warnings": list(result.site.warnings) + list(result.grid.warnings) + list(result.model.warnings),
        "results": summary,
        **({"risk_budget": {k: v for k, v in result.budget_record.items() if k != "curve"}}
           if result.budget_record is not None else {}),
        "exact": exact,
        "timings_s": {k: round(v, 3) for k, v in result.timings.items()},
    }


# ----------------------------------------------------------------------------- reading back


MANIFEST_KEYS = {"format": str, "format_version": int, "input": dict, "settings": dict, "seeds": dict,
                 "versions": dict, "files": dict, "results": dict}
#: Largest manifest read back, and largest file of a run folder read back (bytes).
MAX_MANIFEST_BYTES = 16 * 2**20
MAX_MEMBER_BYTES = 4 * 2**30
#: A manifest nests four levels; anything far deeper is not one of ours.
MAX_JSON_DEPTH = 32
#: Whole numbers in a manifest have at most this many digits (a 128-bit seed has 39).
MAX_INT_DIGITS = 60

_NUMBER = (int, float)
_RESULT_SCHEMA = {"converged": bool, "message": str, "agreement": _NUMBER, "value_gap_m": (int, float, type(None)),
                  "seed_routes_matching": int, "n_seeds": int}
#: What readers of a manifest rely on, checked once on loading: a type, a tuple of types,
#: a dict of keys ("*": every member) or a one-item list (every item).
MANIFEST_SCHEMA = {
    "created_utc": str, "input": {"site": str}, "seeds": {"entropy": str}, "versions": {"*": str},
    "files": {"*": str}, "results": {"cautious": _RESULT_SCHEMA, "shortest": _RESULT_SCHEMA},
    "model": {"boundary_penalty_m": _NUMBER, "hazard_penalty_m": [_NUMBER]}, "warnings": [str],
}


def _schema_error(where: str, path: str, value, spec) -> RunFolderError:
    if isinstance(spec, dict):
        want = "an object"
    elif isinstance(spec, list):
        want = "a list"
    else:
        kinds = spec if isinstance(spec, tuple) else (spec,)
        want = " or ".join("null" if k is type(None) else "a number" if k is float else f"a {k.__name__}"
                           for k in dict.fromkeys(kinds))
    shown = "missing" if value is _MISSING else f"{type(value).__name__}"
    return RunFolderError(f"{where}: manifest key {path!r} is {shown}, expected {want}; the run folder was changed")


_MISSING = object()


def check_schema(value, spec, where: str, path: str = "") -> None:
    """Refuse ``value`` unless it has the shape ``spec`` describes (see :data:`MANIFEST_SCHEMA`)."""
    if isinstance(spec, dict):
        if not isinstance(value, dict):
            raise _schema_error(where, path, value, spec)
        for key, inner in spec.items():
            if key == "*":
                for k, v in value.items():
                    check_schema(v, inner, where, f"{path}.{k}" if path else k)
            else:
                check_schema(value.get(key, _MISSING), inner, where, f"{path}.{key}" if path else key)
        return
    if isinstance(spec, list):
        if not isinstance(value, list):
            raise _schema_error(where, path, value, spec)
        for k, v in enumerate(value):
            check_schema(v, spec[0], where, f"{path}[{k}]")
        return
    kinds = spec if isinstance(spec, tuple) else (spec,)
    if value is _MISSING or not isinstance(value, kinds) or (isinstance(value, bool) and bool not in kinds):
        raise _schema_error(where, path, value, spec)


def _strict_pairs(pairs):
    obj = dict(pairs)
    if len(obj) != len(pairs):
        seen: set = set()
        again = next(k for k, _ in pairs if k in seen or seen.add(k))
        raise ValueError(f"key {again!r} appears more than once")
    return obj


def _strict_int(text: str) -> int:
    if len(text.lstrip("-")) > MAX_INT_DIGITS:
        raise ValueError(f"a whole number of {len(text.lstrip('-')):,} digits (at most {MAX_INT_DIGITS})")
    return int(text)


def _strict_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"number {text[:30]} is out of range")
    return value


def _refuse_json_constant(name: str):
    raise ValueError(f"{name} is not a JSON number")


def _depth(value) -> int:
    """Nesting depth of a parsed JSON value (iterative: no recursion limit to hit)."""
    deepest, stack = 0, [(value, 1)]
    while stack:
        node, level = stack.pop()
        if isinstance(node, (dict, list)):
            deepest = max(deepest, level)
            if level > MAX_JSON_DEPTH:
                return level
            stack.extend((v, level + 1) for v in (node.values() if isinstance(node, dict) else node))
    return deepest


def parse_json_strict(data: bytes, where: str):
    """JSON from a run folder: UTF-8, no repeated keys, no NaN or infinities, bounded numbers and nesting."""
    try:
        value = json.loads(data.decode("utf-8"), object_pairs_hook=_strict_pairs, parse_int=_strict_int,
                           parse_float=_strict_float, parse_constant=_refuse_json_constant)
    except RecursionError as err:
        raise RunFolderError(f"{where}: nested too deeply to be ours; the run folder was changed") from err
    except (UnicodeDecodeError, ValueError) as err:  # JSONDecodeError is a ValueError
        raise RunFolderError(f"{where}: not valid JSON ({err})") from err
    if _depth(value) > MAX_JSON_DEPTH:
        raise RunFolderError(f"{where}: nested more than {MAX_JSON_DEPTH} levels deep; the run folder was changed")
    return value


def read_member(folder: Path, name: str, *, limit: int = MAX_MEMBER_BYTES) -> bytes:
    """The bytes of file ``name`` of a run folder, read once: never through a symlink, only a plain file."""
    path = folder / name
    flags = os.O_RDONLY | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_NONBLOCK", 0)
    try:
        fd = os.open(path, flags)
    except FileNotFoundError as err:
        raise RunFolderError(f"{folder}: {name} is listed in the manifest but missing") from err
    except OSError as err:
        if os.path.islink(path):
            raise RunFolderError(f"{folder}: {name} is a symbolic link; a run folder holds plain files only, "
                                 "so it is not followed") from err
        raise RunFolderError(f"{folder}: cannot read {name} ({err.strerror or err})") from err
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise RunFolderError(f"{folder}: {name} is not a plain file")
        if info.st_size > limit:
            raise RunFolderError(f"{folder}: {name} is {info.st_size:,} bytes, over the {limit:,}-byte limit "
                                 "for a run-folder file")
        chunks, total = [], 0
        while chunk := os.read(fd, 1 << 20):
            total += len(chunk)
            if total > limit:
                raise RunFolderError(f"{folder}: {name} grew past {limit:,} bytes while it was read")
            chunks.append(chunk)
        return b"".join(chunks)
    except OSError as err:
        if isinstance(err, RunFolderError):
            raise
        raise RunFolderError(f"{folder}: cannot read {name} ({err.strerror or err})") from err
    finally:
        os.close(fd)


@dataclass(frozen=True)
class Run:
    """A run folder read back and checked.

    Its manifest, settings, policies, and the bytes of every file the manifest lists
    (read once, matching their hashes).
    """

    folder: Path
    manifest: dict
    settings: PlanSettings
    arrays: dict
    blobs: dict = field(default_factory=dict, repr=False)

    @property
    def site_path(self) -> Path:
        """The run's own copy of its site file."""
        return self.folder / "site.geojson"


def load_run(folder) -> Run:
    """Read a run folder, checking its manifest schema, version and file hashes.

    Only files the manifest lists are opened, each once, never through a symlink; the
    bytes whose hash matched are the bytes every later step uses (``Run.blobs``).

    Raises
    ------
    RunFolderError
        Missing folder or manifest, another format, a newer version, a manifest that is
        not the shape veerwise writes, a file whose hash differs from the manifest
        (tampered or damaged), a listed file that is a symlink, or bad policy arrays.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise RunFolderError(f"{folder}: no such run folder")
    path = folder / "manifest.json"
    if not os.path.lexists(path):
        raise RunFolderError(f"{folder}: has no manifest.json; not a complete veerwise run folder")
    manifest = parse_json_strict(read_member(folder, "manifest.json", limit=MAX_MANIFEST_BYTES),
                                 f"{path}: manifest")
    if not isinstance(manifest, dict):
        raise RunFolderError(f"{path}: manifest is not a JSON object")
    for key, kind in MANIFEST_KEYS.items():
        value = manifest.get(key)
        if not isinstance(value, kind) or (kind is int and isinstance(value, bool)):
            raise RunFolderError(f"{path}: manifest key {key!r} is missing or not a {kind.__name__}")
    if manifest["format"] != RUN_FORMAT:
        raise RunFolderError(f"{path}: format {manifest['format'][:40]!r} is not a veerwise run")
    if manifest["format_version"] > RUN_FORMAT_VERSION:
        raise RunFolderError(
            f"{path}: run folder format {manifest['format_version']} is newer than this veerwise understands "
            f"({RUN_FORMAT_VERSION}); upgrade veerwise"
        )
    entropy = manifest["seeds"].get("entropy")
    if not (isinstance(entropy, str) and entropy.isascii() and entropy.isdigit() and len(entropy) <= 39
            and int(entropy) <= MAX_SEED):
        raise RunFolderError(f"{path}: manifest seeds.entropy is missing or not a whole number in [0, 2**128)")
    check_schema(manifest, MANIFEST_SCHEMA, str(path))
    blobs = {}
    for name, digest in manifest["files"].items():
        if Path(name).name != name or name.startswith(".") or name in ("", "manifest.json") or "\x00" in name:
            raise RunFolderError(f"{path}: file entry {name[:60]!r} is not a plain file name")
        blob = read_member(folder, name)
        if hashlib.sha256(blob).hexdigest() != digest:
            raise RunFolderError(f"{folder}: {name} does not match its hash in the manifest (changed or damaged)")
        blobs[name] = blob
    for required in ("policies.npz", "site.geojson"):
        if required not in manifest["files"]:
            raise RunFolderError(f"{path}: manifest does not list {required}")
    settings = settings_from_record(manifest["settings"])
    arrays = _load_policies(folder / "policies.npz", blobs["policies.npz"])
    return Run(folder=folder, manifest=manifest, settings=settings, arrays=arrays, blobs=blobs)


def _load_policies(path: Path, data: bytes) -> dict:
    import io
    import zipfile

    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in npz.files}
    except (ValueError, OSError, zipfile.BadZipFile, EOFError) as err:
        raise RunFolderError(f"{path}: cannot read policies ({err})") from err
    for key, dtype in {**POLICY_ARRAYS, **OPTIONAL_POLICY_ARRAYS}.items():
        if key not in arrays:
            if key in OPTIONAL_POLICY_ARRAYS:
                continue
            raise RunFolderError(f"{path}: missing array {key!r}")
        if arrays[key].dtype != np.dtype(dtype):
            raise RunFolderError(f"{path}: array {key!r} has dtype {arrays[key].dtype}, expected {dtype}")
    return arrays


def rebuild_grid(run: Run):
    """Site and grid of a run, rebuilt from its site copy and recorded settings.

    The run's policy arrays are checked against the grid (shape and action range).
    """
    from planner.errors import BudgetError
    from planner.grid import rasterise
    from planner.site import site_from_bytes

    s = run.settings
    try:
        site = site_from_bytes(run.blobs["site.geojson"], source=str(run.site_path), crs=s.crs, fix=s.fix)
        grid = rasterise(site, s.grid)
        check_drift_scales(grid, s.dynamics, "settings.dynamics.drift_scale", (s.dynamics.drift_scale,))
        check_drift_scales(grid, s.dynamics, "settings.drift_scales", s.drift_scales)
    except (SettingsError, BudgetError) as err:
        raise RunFolderError(f"{run.folder}: its recorded settings do not rebuild the run ({err}); the manifest "
                             "was changed") from err
    n_states, n_actions = grid.n_cells, s.dynamics.n_actions
    present = [*POLICY_ARRAYS, *(k for k in OPTIONAL_POLICY_ARRAYS if k in run.arrays)]
    for key in present:
        arr = run.arrays[key]
        expected = (n_states,) if key.startswith("greedy") else (n_states, n_actions)
        if arr.shape != expected:
            raise RunFolderError(f"{run.folder}: policy array {key!r} has shape {arr.shape}, expected {expected}")
    for key in (k for k in present if k.startswith("greedy")):
        arr = run.arrays[key]
        if arr.size and (arr.min() < 0 or arr.max() >= n_actions):
            raise RunFolderError(f"{run.folder}: policy array {key!r} holds actions outside 0..{n_actions - 1}")
    return site, grid


def rebuild(run: Run):
    """Site, grid and model of a run (see :func:`rebuild_grid`)."""
    from planner.model import build_model

    site, grid = rebuild_grid(run)
    return site, grid, build_model(grid, run.settings.dynamics)


def run_routes(run: Run, site, grid, model) -> dict:
    """The nominal routes of a run's two policies, rebuilt on its model."""
    from planner.route import build_route, nominal_path

    names = (*POLICIES, ROUTE_BUDGET) if f"greedy_{ROUTE_BUDGET}" in run.arrays else POLICIES
    return {name: build_route(name, nominal_path(model, run.arrays[f"greedy_{name}"]), grid, site, model)
            for name in names}


#: Policies ``veerwise risk`` can tabulate, and the arrays they come from.
RISK_POLICIES = {
    "cautious": "greedy_cautious", "shortest": "greedy_shortest",
    "exact on-policy": "greedy_exact_on_policy", "exact optimal": "greedy_exact_optimal",
    ROUTE_BUDGET: f"greedy_{ROUTE_BUDGET}",
}


def run_risk(run: Run, grid, *, noises, drift_scales, budget_m=None, rollouts=0, seed=None,
             policies=("cautious", "shortest"), progress=None) -> list:
    """The risk table of a run's policies at the given settings (model rebuilt per drift scale).

    ``progress``, when given, is called as ``progress(done_rows, total_rows)`` after each row.
    """
    from planner.risk import sensitivity

    check_seed(seed, "--rollout-seed")
    check_drift_scales(grid, run.settings.dynamics, "--table-drifts", drift_scales)
    budget = budget_moves(run.settings.dynamics, grid.cell_m, budget_m)
    chosen = {}
    for name in policies:
        if name not in RISK_POLICIES:
            raise SettingsError(f"--policy {name!r} is not one of {', '.join(RISK_POLICIES)}")
        if RISK_POLICIES[name] not in run.arrays:
            raise SettingsError(f"--policy {name!r}: this run has no {name} route (plan it with --risk-budget)")
        chosen[name] = run.arrays[RISK_POLICIES[name]]
    root = np.random.SeedSequence(seed) if seed is not None else np.random.SeedSequence(
        int(run.manifest["seeds"]["entropy"]), spawn_key=(2,))
    return sensitivity(grid, run.settings.dynamics, chosen, noises=noises, drift_scales=drift_scales, budget=budget,
                       rollouts=rollouts, seed=root, progress=progress,
                       flag_z=table_z(grid, len(chosen), noises, drift_scales, budget))


def rewrite_brief(run) -> tuple[Path, Path | None]:
    """Render ``brief.html``/``brief.pdf`` again from a run folder, and update its manifest.

    Returns the two paths; the PDF's is None when this machine cannot print it (see
    :func:`planner.brief.pdf_unavailable`), and then no out-of-date PDF is kept.

    One transaction on the folder (``run`` is a :class:`Run` or a folder path): under
    its lock the run is read again, the briefing is rendered into a temporary sibling
    holding exactly the checked bytes of the files the manifest lists (so no figure can
    come from anywhere else), a new manifest is written there, every file the user
    added is carried over by hard link, and the new folder replaces the old in one step.
    """
    from planner.brief import BriefInputs, write_brief
    from planner.gridcheck import row_from_record

    folder = run.folder if isinstance(run, Run) else Path(run)
    with run_lock(folder) as path:
        run = load_run(path)
        site, grid, model = rebuild(run)
        routes = run_routes(run, site, grid, model)
        if "risk.json" not in run.blobs:
            raise RunFolderError(f"{path}: manifest does not list risk.json, which the briefing needs")
        records = parse_json_strict(run.blobs["risk.json"], f"{path / 'risk.json'}")
        try:
            if not (isinstance(records, list) and records and all(isinstance(r, dict) for r in records)):
                raise ValueError("expected a non-empty list of rows")
            rows = [row_from_record(r) for r in records]
        except (TypeError, KeyError, ValueError, AttributeError) as err:
            raise RunFolderError(f"{path}: cannot read risk.json ({err})") from err
        from planner.budget_plan import extras_from_records

        budget, causes = extras_from_records(records)
        manifest = dict(run.manifest)
        identity = run_identity(manifest)
        if manifest.setdefault("run_id", identity) != identity:
            raise RunFolderError(f"{path}: manifest.json was changed after the run (its run id "
                                 f"{manifest['run_id']} does not match its content, {identity})")
        listed = set(run.blobs)
        with atomic_folder(path, force=True) as tmp:
            for name, blob in run.blobs.items():
                if name not in ("brief.html", "brief.pdf"):
                    (tmp / name).write_bytes(blob)
            inputs = BriefInputs(folder=tmp, site=site, grid=grid, routes=routes, risk_rows=rows,
                                 settings=run.settings, manifest=manifest, run_name=path.name, budget=budget,
                                 causes=causes)
            _, pdf = write_brief(inputs, tmp / "brief.html", tmp / "brief.pdf")
            write_manifest(tmp, manifest)
            _carry_over(path, tmp, skip=listed | {"manifest.json", "brief.html", "brief.pdf"})
    return path / "brief.html", (path / "brief.pdf" if pdf is not None else None)


def _carry_over(old: Path, new: Path, *, skip: set) -> None:
    """Hard-link into ``new`` every entry of ``old`` that veerwise did not write.

    The user's notes, a review folder: nothing a user put in a run folder is lost when
    it is replaced. Links are made without opening or following anything.
    """
    for entry in old.iterdir():
        if entry.name in skip or os.path.lexists(new / entry.name):
            continue
        if entry.is_dir() and not entry.is_symlink():
            shutil.copytree(entry, new / entry.name, symlinks=True, copy_function=_link_or_copy)
        else:
            _link_or_copy(entry, new / entry.name)


def _link_or_copy(src, dst) -> None:
    try:
        os.link(src, dst, follow_symlinks=False)
    except OSError:
        shutil.copy2(src, dst, follow_symlinks=False)
