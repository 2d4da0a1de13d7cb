"""A campaign's jobs: every scenario checked before any work, then run on Dask distributed.

:func:`check_campaign` turns each scenario of a campaign read by
:mod:`planner.campaign` into a :class:`Job` (its checked settings, seed, site file and
run folder), loading each distinct scenario site and rasterising each distinct grid
once, so a bad scenario is refused before anything runs. :func:`run_jobs` sends the
jobs to a Dask cluster (:func:`make_client`: a local one or a running scheduler),
each running through the same public functions as ``plan``
(:func:`planner.pipeline.compute_plan`, :func:`~planner.runfolder.write_run`) into a
run folder of its own, and gives back each scenario's outcome as plain data, its
routes' figures read back from the finished folder (:func:`route_rows`).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from planner.campaign import (
    PROVENANCE_SETTINGS,
    Campaign,
    CampaignError,
    Scenario,
    folder_name,
    name_slug,
    scenario_identity,
    scenario_seed,
    scenario_site_bytes,
)
from planner.errors import PlannerError, SettingsError

#: Name of the run-folder directory inside the campaign's output folder.
RUNS_DIR = "runs"
SITES_DIR = "sites"


@dataclass(frozen=True)
class Job:
    """A scenario ready to run: its checked settings, seed, site file and run folder."""

    index: int
    scenario: Scenario
    settings: object
    identity: str
    seed: int
    site_key: str
    site_bytes: bytes = field(repr=False)
    folder: str
    #: SHA-256 of ``site_bytes`` (what the run's manifest must name to count as finished)
    site_sha256: str


@dataclass(frozen=True)
class Prepared:
    """What scenarios of one site file and grid share: the site and its grid."""

    site: object
    grid: object


def prepare(site_bytes: bytes, source: str, settings) -> Prepared:
    """Load a scenario site from its bytes and rasterise it."""
    from planner.grid import rasterise
    from planner.site import site_from_bytes

    site = site_from_bytes(site_bytes, source=source, crs=settings.crs, fix=settings.fix)
    return Prepared(site=site, grid=rasterise(site, settings.grid))


def grid_key(site_key: str, settings) -> str:
    """Which scenarios can share one grid: the same site bytes and grid settings."""
    spec = json.dumps(dataclasses.asdict(settings.grid), sort_keys=True)
    return hashlib.sha256(f"{site_key}|{spec}|{settings.crs}|{settings.fix}".encode()).hexdigest()[:16]


def model_key(grid, settings) -> str:
    """Which scenarios can share one model and its exact references.

    The same grid but for its start cell (a campaign's pairs with one target), the
    same dynamics (vehicle and drift case) and the same exploration noise.
    """
    from planner.settings import settings_record

    digest = hashlib.sha256()
    for field_ in dataclasses.fields(grid):
        value = getattr(grid, field_.name)
        if field_.name == "start":
            continue
        if isinstance(value, np.ndarray):
            digest.update(f"{field_.name}|{value.dtype.str}|{value.shape}|".encode())
            digest.update(np.ascontiguousarray(value).tobytes())
        else:
            digest.update(f"{field_.name}|{value!r}|".encode())
    record = settings_record(settings)
    digest.update(json.dumps({"dynamics": record["dynamics"], "epsilon": settings.learn.epsilon},
                             sort_keys=True, default=str).encode())
    return digest.hexdigest()[:16]


@dataclass
class Plan:
    """A campaign checked and ready: its jobs, the site files they need and the shared grids."""

    campaign: Campaign
    jobs: list
    #: site key -> (file name under ``sites/``, bytes)
    sites: dict
    #: grid key -> :class:`Prepared`, built while checking (so built once)
    prepared: dict

    def usable_cells(self, job: Job) -> int:
        """Usable cells of a job's grid (for the time estimate)."""
        grid = self.prepared[grid_key(job.site_key, job.settings)].grid
        return int((grid.passable() & ~grid.goal).sum())


def _scenario_error(campaign: Campaign, scenario: Scenario, err: Exception) -> CampaignError:
    return CampaignError(f"{campaign.path}: scenario {scenario.name!r}: {one_line(str(err))}")


def check_campaign(campaign: Campaign, settings_for: Callable) -> Plan:
    """Check every scenario before any work starts and make its job.

    ``settings_for(scenario, site_of, grid_of)`` gives a scenario's
    :class:`~planner.settings.PlanSettings` from ``site_of(crs, fix)``, its site,
    and ``grid_of(spec, crs, fix)``, that site rasterised (the command line builds them with ``plan``'s own
    option types and defaults). Each distinct site file (a pair and a drift bearing)
    is loaded and each distinct grid rasterised once, here; the same objects are
    handed to the workers.

    Raises
    ------
    CampaignError
        Naming the scenario (or the site file) and what is wrong with it.
    """
    from planner.grid import rasterise
    from planner.pipeline import budget_moves, check_drift_scales
    from planner.settings import check_plan_size, settings_record
    from planner.site import parse_site_bytes, read_site_bytes, site_from_bytes

    base_bytes = read_site_bytes(campaign.site_path)
    base_obj, _ = parse_site_bytes(base_bytes, str(campaign.site_path))
    site_from_bytes(base_bytes, source=str(campaign.site_path))  # the site file itself is sound
    by_place: dict = {}
    sites: dict = {}
    loaded: dict = {}
    digests: dict = {}
    grids: dict = {}
    prepared: dict = {}
    jobs = []
    for index, scenario in enumerate(campaign.scenarios):
        where = (scenario.pair.name, scenario.drift.bearing_change_deg)
        if where not in by_place:
            data = scenario_site_bytes(base_obj, scenario.pair, scenario.drift, str(campaign.path))
            digest = hashlib.sha256(data).hexdigest()
            slug = name_slug(scenario.pair.name, 40, "pair")
            by_place[where] = f"{slug}-{digest[:10]}"
            sites[by_place[where]] = (f"{by_place[where]}.geojson", data)
            digests[by_place[where]] = digest
        site_key = by_place[where]
        data = sites[site_key][1]
        try:
            if site_key not in loaded:
                loaded[site_key] = {}
            def site_of(crs=None, fix=False, _key=site_key, _data=data):
                if (crs, fix) not in loaded[_key]:
                    loaded[_key][(crs, fix)] = site_from_bytes(_data, source="its site", crs=crs, fix=fix)
                return loaded[_key][(crs, fix)]

            def grid_of(spec, crs=None, fix=False, _key=site_key):
                key = (_key, json.dumps(dataclasses.asdict(spec), sort_keys=True), crs, fix)
                if key not in grids:
                    grids[key] = rasterise(site_of(crs, fix, _key), spec)
                return grids[key]

            settings = settings_for(scenario, site_of, grid_of)
            site = site_of(settings.crs, settings.fix)
            grid = grid_of(settings.grid, settings.crs, settings.fix)
            prepared.setdefault(grid_key(site_key, settings), Prepared(site=site, grid=grid))
            settings.dynamics.move_length_m(grid.cell_m)
            check_drift_scales(grid, settings.dynamics, "Dynamics.drift_scale", (settings.dynamics.drift_scale,))
            check_drift_scales(grid, settings.dynamics, "PlanSettings.drift_scales", settings.drift_scales)
            budget_moves(settings.dynamics, grid.cell_m, settings.budget_m)
            check_plan_size(grid, settings)
        except PlannerError as err:
            raise _scenario_error(campaign, scenario, err) from err
        identity = scenario_identity(digests[site_key], settings_record(settings))
        seed = scenario_seed(campaign.seed, identity)
        settings = dataclasses.replace(settings, seed=seed, settings_file=str(campaign.path),
                                       settings_sha256=campaign.sha256)
        jobs.append(Job(index=index, scenario=scenario, settings=settings, identity=identity, seed=seed,
                        site_key=site_key, site_bytes=data, folder=folder_name(scenario, identity),
                        site_sha256=digests[site_key]))
    return Plan(campaign=campaign, jobs=jobs, sites=sites, prepared=prepared)


def finished(folder: Path, job: Job, site_sha256: str) -> bool:
    """Whether ``folder`` holds this job's complete run (its site, settings and seed)."""
    from planner.errors import RunFolderError
    from planner.runload import load_run
    from planner.settings import settings_record

    if not (folder / "manifest.json").is_file():
        return False
    try:
        run = load_run(folder)
    except (RunFolderError, SettingsError, ValueError):
        return False
    recorded = run.manifest["settings"]
    wanted = settings_record(job.settings)
    return (run.manifest["input"].get("sha256") == site_sha256
            and {k: v for k, v in recorded.items() if k not in PROVENANCE_SETTINGS}
            == {k: v for k, v in json.loads(json.dumps(wanted)).items() if k not in PROVENANCE_SETTINGS}
            and run.manifest["seeds"].get("entropy") == str(job.seed))


def build_shared(prepared: Prepared, settings):
    """A model and its exact references for every scenario of one :func:`model_key` (a Dask task)."""
    from planner.pipeline import shared_model

    return shared_model(prepared.grid, settings)


def run_job(job: Job, out_dir: str, site_path: str, prepared: Prepared | None = None, shared=None,
            done: bool | None = None) -> dict:
    """Run one scenario into ``out_dir/runs/FOLDER`` (or find it finished): its outcome as plain data.

    Runs on a Dask worker. A failure is caught and returned with its one-line message,
    so the other scenarios go on; nothing is left half-written (the run folder's own
    transaction). ``done``, when the caller has already looked, says whether the
    folder holds this job's finished run (so it is read once, not twice).
    """
    from planner.pipeline import compute_plan
    from planner.progress import Progress
    from planner.runfolder import write_run
    from planner.transactions import check_out, run_lock

    folder = Path(out_dir) / RUNS_DIR / job.folder
    started = time.perf_counter()
    outcome = {"index": job.index, "folder": str(Path(RUNS_DIR) / job.folder), "status": "failed", "error": None,
               "elapsed_s": 0.0, "worker_pid": os.getpid()}
    site_sha256 = job.site_sha256
    try:
        with run_lock(folder):
            if done if done is not None else finished(folder, job, site_sha256):
                outcome["status"] = "skipped"
            else:
                check_out(folder, force=True)
                if prepared is None:
                    prepared = prepare(job.site_bytes, site_path, job.settings)
                result = compute_plan(site_path, job.settings, Progress(), site=prepared.site, grid=prepared.grid,
                                      shared=shared)
                write_run(result, job.settings, site_path, folder, force=True)
                outcome["status"] = "done"
        outcome["routes"] = route_rows(folder)
    except PlannerError as err:
        outcome["error"] = one_line(str(err))
    except (OSError, MemoryError) as err:
        outcome["error"] = one_line(f"{type(err).__name__}: {err}")
    except Exception as err:  # noqa: BLE001 - one scenario's bug must not stop the campaign; it is reported
        outcome["error"] = one_line(f"internal error (a bug, please report it): {type(err).__name__}: {err}")
    outcome["elapsed_s"] = round(time.perf_counter() - started, 2)
    return outcome


def one_line(text: str, limit: int = 400) -> str:
    """A message on one line, at most ``limit`` characters."""
    flat = " ".join(str(text).split())
    return flat if len(flat) <= limit else flat[:limit - 3] + "..."


def _num(x):
    return None if x is None or not math.isfinite(x) else float(x)


def route_rows(folder: Path) -> list[dict]:
    """Per route of a finished run folder: P(incident), length, verdicts (read back and checked by hash)."""
    from planner.runload import load_run

    run = load_run(folder)
    manifest = run.manifest
    eps = run.settings.learn.epsilon
    base = run.settings.dynamics.drift_scale
    rows = json.loads(run.blobs["risk.json"])
    out = []
    for name in ("cautious", "shortest"):
        row = next(r for r in rows if r["policy"] == name and math.isclose(r["noise"], eps)
                   and math.isclose(r["drift_scale"], base))
        result = manifest["results"][name]
        check = row.get("grid_check") or {}
        if check.get("skipped"):
            grid_verdict = f"skipped: {check['skipped']}"
        elif check:
            grid_verdict = "differs beyond tolerance" if check.get("flagged") else "agrees"
        else:
            grid_verdict = "not run"
        mc = (row.get("mc") or {}).get("incident") or {}
        out.append({
            "route": name, "p_incident": _num(row["p_incident"]), "p_goal": _num(row["p_goal"]),
            "expected_length_m": _num(row["expected_m"]), "route_length_m": result["length_m"],
            "reached_goal": result["reached_goal"],
            "mc_p_incident": _num(mc.get("estimate")), "mc_lo": _num(mc.get("lo")), "mc_hi": _num(mc.get("hi")),
            "converged": bool(result["converged"]),
            "seed_routes_matching": result["seed_routes_matching"], "n_seeds": result["n_seeds"],
            "grid_check": grid_verdict, "p_incident_half_cell": _num(check.get("p_incident_fine")),
            "run_id": manifest["run_id"],
        })
    return out


@dataclass
class CampaignRun:
    """What a campaign did: one outcome per job, in the campaign's order, and how long it took."""

    outcomes: list
    elapsed_s: float
    n_workers: int
    dashboard: str | None = None


def make_client(*, scheduler: str | None = None, n_workers: int | None = None, timeout_s: float = 5.0):
    """A Dask client: of the running scheduler at ``scheduler``, or of a new local cluster.

    The local cluster has ``n_workers`` processes (default: the cores this process may
    use) with one thread each: the numerical kernels hold the interpreter, so threads
    would queue behind one another.

    Raises
    ------
    CampaignError
        When the scheduler cannot be reached within ``timeout_s``.
    """
    import logging

    from distributed import Client, LocalCluster

    for noisy in ("distributed", "bokeh", "tornado"):
        logging.getLogger(noisy).setLevel(logging.ERROR)
    if scheduler is not None:
        try:
            return Client(scheduler, timeout=f"{timeout_s}s")
        except (OSError, TimeoutError, ValueError, TypeError) as err:
            raise CampaignError(f"campaign.scheduler {scheduler}: cannot reach a Dask scheduler there "
                                f"({one_line(str(err) or type(err).__name__, 160)}); nothing was written") from err
    n = n_workers or len(os.sched_getaffinity(0))
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, dashboard_address=":0",
                           silence_logs=logging.ERROR)
    return Client(cluster)


def write_sites(plan: Plan, out_dir) -> dict:
    """Write each scenario site file into ``out_dir/sites`` (atomically); site key -> path."""
    from planner.export import atomic_output

    folder = Path(out_dir) / SITES_DIR
    folder.mkdir(parents=True, exist_ok=True)
    paths = {}
    for key, (name, data) in plan.sites.items():
        path = folder / name
        if not (path.is_file() and path.read_bytes() == data):
            with atomic_output(path) as tmp:
                tmp.write_bytes(data)
        paths[key] = path
    return paths


def run_jobs(client, plan: Plan, out_dir, *, share: bool = True,
             on_outcome: Callable[[Job, dict], None] | None = None) -> CampaignRun:
    """Run the plan's jobs on ``client``'s cluster, each into ``out_dir/runs/FOLDER``.

    With ``share`` the sites and grids built while checking are sent to the cluster
    once each and handed to every scenario that uses them, and each distinct model
    (:func:`model_key`) is built once, with its exact references, by a task of its own
    that those scenarios wait for; without, every scenario loads, rasterises and
    builds its own (the benchmark's comparison). ``on_outcome`` is
    called as each scenario finishes. Outcomes come back in the campaign's order.
    """
    from distributed import as_completed

    started = time.perf_counter()
    out_dir = Path(out_dir).resolve()  # workers may run in another folder (or on another machine)
    site_paths = write_sites(plan, out_dir)
    (Path(out_dir) / RUNS_DIR).mkdir(exist_ok=True)
    shared = {}
    models = {}
    futures = {}
    for job in plan.jobs:
        source = str(site_paths[job.site_key])
        given = built = None
        done = finished(out_dir / RUNS_DIR / job.folder, job, job.site_sha256)
        if share:
            key = grid_key(job.site_key, job.settings)
            if key not in shared:
                item = plan.prepared[key]
                # the scenario's site file is the one its run folder names as its input
                item = Prepared(site=dataclasses.replace(item.site, source=source), grid=item.grid)
                shared[key] = client.scatter(item, hash=False)
            given = shared[key]
            # a finished scenario (a rerun) is skipped by its job: no model is built for it
            if not done:
                mkey = model_key(plan.prepared[key].grid, job.settings)
                if mkey not in models:
                    models[mkey] = client.submit(build_shared, given, job.settings, pure=False,
                                                 key=f"model-{mkey}-{time.time_ns()}")
                built = models[mkey]
        futures[client.submit(run_job, job, str(out_dir), source, given, built, done, pure=False,
                              key=f"scenario-{job.index}-{job.identity[:10]}-{time.time_ns()}")] = job
    outcomes = {}
    for future in as_completed(futures):
        job = futures[future]
        try:
            outcome = future.result()
        except Exception as err:  # noqa: BLE001 - a lost worker fails its scenario only; the rest go on
            outcome = {"index": job.index, "folder": str(Path(RUNS_DIR) / job.folder), "status": "failed",
                       "error": one_line(f"{type(err).__name__}: {err}"), "elapsed_s": 0.0}
        outcomes[job.index] = outcome
        if on_outcome is not None:
            on_outcome(job, outcome)
    n_workers = len(client.scheduler_info().get("workers", {}))
    return CampaignRun(outcomes=[outcomes[j.index] for j in plan.jobs], elapsed_s=time.perf_counter() - started,
                       n_workers=n_workers, dashboard=getattr(client, "dashboard_link", None))
