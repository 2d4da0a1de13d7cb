"""The ``plan`` pipeline: every stage of one plan, run in memory.

site -> grid -> model -> exact references and ties by safety -> (risk budget) ->
learners -> verdicts -> routes -> risk table -> grid check -> (causes), gathered in a
:class:`PlanResult`. Nothing here writes a file: :mod:`planner.runfolder` stores a
result, :mod:`planner.runload` reads a stored one back.
"""

from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass, field

import numpy as np

from planner.budget_plan import ROUTE_NAME
from planner.errors import SettingsError
from planner.progress import Progress
from planner.settings import PlanSettings, check_plan_size

#: The two learned policies, in the order every table and file lists them.
POLICIES = ("cautious", "shortest")
#: The third route, delivered with ``--risk-budget``.
ROUTE_BUDGET = ROUTE_NAME
#: Actions within this many cells (metres-equivalent / cell size) of the exact best
#: count as agreeing: a detour below the grid's resolution is no disagreement.
TIE_CELLS = 0.25
#: A learned policy within this share of the exact value at the start (or one cell)
#: counts as converged on value.
GAP_SHARE = 0.01
#: How the manifest and the files name each learner.
METHOD_NAMES = {"sarsa": "SARSA", "qlearning": "Q-learning"}


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


def check_drift_scales(grid, dynamics, setting: str, scales) -> None:
    """Refuse, naming ``setting``, any drift scale that would push a vehicle across the whole grid."""
    from planner.motion import landing_tables

    for scale in scales:
        try:
            landing_tables(grid, dynamics, scale)
        except SettingsError as err:
            raise SettingsError(f"{setting} {scale:g}: {err}") from err


def budget_moves(settings_dynamics, cell_m: float, budget_m: float | None) -> int | None:
    """The whole moves a travel budget in metres allows, refusing one shorter than a move."""
    from planner.motion import moves_within

    if budget_m is None:
        return None
    move = settings_dynamics.move_length_m(cell_m)
    moves = moves_within(budget_m, move)
    if moves < 1:
        raise SettingsError(f"PlanSettings.budget_m {budget_m:g} m is shorter than one move ({move:g} m)")
    return moves


@dataclass(frozen=True)
class SharedModel:
    """What plans on one grid, vehicle and noise share whatever their start: the model and exact references.

    The model's outcomes and the exact Q of every state do not depend on the start
    cell; only ``model.start`` does, and :func:`compute_plan` sets it to its own grid's.
    """

    model: object
    #: route name -> :class:`planner.exact.ExactSolution`
    exact: dict
    #: seconds spent building ``model`` (``model_s``) and ``exact`` (``exact_s``)
    seconds: dict = field(default_factory=dict)


def shared_model(grid, settings: PlanSettings, progress: Progress | None = None) -> SharedModel:
    """Build ``grid``'s model for ``settings.dynamics`` and its two exact references."""
    from planner.exact import on_policy_q, optimal_q
    from planner.model import build_model

    progress = progress or Progress()
    t = time.perf_counter()
    with progress.task("building the model"):
        model = build_model(grid, settings.dynamics)
    t_exact = time.perf_counter()
    progress(f"model: {model.n_outcomes:,} outcomes ({model.nbytes / 2**20:.1f} MiB)")
    # The exact references come before the learners: the sweeps schedule stops on the
    # risk verdict against them.
    with progress.task("exact references (value iteration)", 2) as report:
        exact = {"cautious": on_policy_q(model, settings.learn.epsilon)}
        report(1)
        exact["shortest"] = optimal_q(model)
    return SharedModel(model=model, exact=exact,
                       seconds={"model_s": t_exact - t, "exact_s": time.perf_counter() - t_exact})


def compute_plan(site_path, settings: PlanSettings, progress: Progress | None = None, *, site=None,
                 grid=None, shared: SharedModel | None = None) -> PlanResult:
    """Run every stage of ``plan`` in memory (no files written).

    ``site`` and ``grid``, when the caller has already loaded and rasterised
    ``site_path`` with these settings, are used instead of doing it again; so is
    ``shared``, the :func:`shared_model` of a grid equal to ``grid`` but for its start
    cell, built with the same dynamics and noise (a campaign's pairs with one target).
    """
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
    check_drift_scales(grid, settings.dynamics, "Dynamics.drift_scale", (settings.dynamics.drift_scale,))
    check_drift_scales(grid, settings.dynamics, "PlanSettings.drift_scales", settings.drift_scales)
    budget_moves(settings.dynamics, grid.cell_m, settings.budget_m)
    check_plan_size(grid, settings)
    # A campaign's shared model was built (and timed) by a task of its own.
    built = {"model_s": 0.0, "exact_s": 0.0}
    if shared is None:
        shared = shared_model(grid, settings, progress)
        built = shared.seconds
    model = dataclasses.replace(shared.model, start=grid.start_index)
    exact = dict(shared.exact)
    timings["model_s"] = time.perf_counter() - t - built["exact_s"]

    root = np.random.SeedSequence(settings.seed)
    seed_cautious, seed_shortest, seed_risk = root.spawn(3)
    to_go = cost_to_goal(grid, settings.dynamics.n_actions,
                         hazard_penalty_m=model.penalty_m, unit_cost=settings.dynamics.step_cost == "move")
    eps = settings.learn.epsilon
    t = time.perf_counter()
    # Ties by safety: among equally good actions, the one that minimises P(incident) at
    # the run's noise; the riskiest tie-break gives the other end of the range.
    check_tie_tolerance(model, settings.tie_m, "PlanSettings.tie_m")
    references = {}
    with progress.task("ties broken by safety (exact references)", len(POLICIES)) as report:
        for k, name in enumerate(POLICIES):
            references[name] = safest_among(model, equally_good(exact[name].q, settings.tie_m), eps,
                                            value=exact[name].q)
            report(k + 1)
    timings["exact_s"] = time.perf_counter() - t + built["exact_s"]
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
