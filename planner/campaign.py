"""Trial campaigns: many plans of one site at once, on this machine or a Dask cluster.

A campaign file (TOML) names one site and the axes of its scenarios: start/goal pairs,
vehicles and drift cases. Every scenario is one ``plan`` of the site with its pair's
start and goal, its vehicle's options and its drift case, run through the same public
functions as ``plan`` (:func:`planner.runfolder.compute_plan`, :func:`write_run`), so
each writes its own run folder with the same transaction rules.

The file::

    site = "../maps/drone-range.geojson"   # relative to the campaign file
    seed = 2026                             # the campaign seed (required)
    risk-limit = 0.01                       # P(incident) above which a scenario is listed first
    expand = "product"                      # or "list", with [[scenarios]]

    [plan]                                  # plan's options, by their long names
    cell = 4                                # (sections as tables, as in plan --settings)
    training-runs = 4

    [[pairs]]
    name = "pad to circle"
    start = [14.1051, 55.2402]              # lon, lat, or the name of a site feature
    goal = "Landing circle"

    [[vehicles]]
    name = "quad"
    move-m = 5                              # headings, move-m, slip, stall, edge, penalty, epsilon

    [[drifts]]
    name = "forecast"
    scale = 1.0                             # --plan-drift of the scenario
    bearing-change-deg = 0                  # turns every drift zone's bearing (clockwise)

    [[drifts]]
    ensemble = "members.csv"                # or one drift case per row: name,scale,bearing-change-deg

This module reads and checks the file's structure, expands its scenarios, gives each
an identity (a hash of its site bytes and settings) and a seed drawn from the campaign
seed and that identity (so results do not depend on the number of workers or the
order of execution), and runs the scenarios on Dask distributed. Option values are
checked by ``plan``'s own option types in :mod:`planner.cli.campaign_commands`.
"""

from __future__ import annotations

import csv
import dataclasses
import hashlib
import io
import json
import math
import os
import re
import time
import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from planner.errors import PlannerError, SettingsError

#: The largest campaign or ensemble file read.
MAX_CAMPAIGN_BYTES = 1_000_000
#: Most scenarios one campaign may expand to (far beyond a test day; a forecast ensemble fits).
MAX_SCENARIOS = 100_000
#: Top-level keys of a campaign file.
TOP_KEYS = ("site", "seed", "risk-limit", "expand", "plan", "pairs", "vehicles", "drifts", "scenarios")
#: Keys of each axis entry.
PAIR_KEYS = ("name", "start", "goal")
#: Options of ``plan`` a vehicle may set (the rest of plan's options go in [plan]).
VEHICLE_OPTIONS = ("headings", "move-m", "slip", "stall", "edge", "penalty", "epsilon")
DRIFT_KEYS = ("name", "scale", "bearing-change-deg", "ensemble")
SCENARIO_KEYS = ("pair", "vehicle", "drift")
#: Options of ``plan`` the campaign sets itself: the drift case and the seed.
CAMPAIGN_SET_OPTIONS = ("plan-drift", "root-seed")
#: Default risk limit: P(incident) above 1 in 100 puts a scenario at the top of the briefing
#: (a reviewer's starting point, not a standard; set ``risk-limit`` for the site).
DEFAULT_RISK_LIMIT = 0.01
#: Name of the run-folder directory inside the campaign's output folder.
RUNS_DIR = "runs"
SITES_DIR = "sites"


class CampaignError(PlannerError, ValueError):
    """A campaign file that cannot be run: names the file and the key or scenario."""


@dataclass(frozen=True)
class Pair:
    """A start/goal pair: each a (lon, lat) point or the name of a feature of the site."""

    name: str
    start: tuple[float, float] | str
    goal: tuple[float, float] | str


@dataclass(frozen=True)
class Vehicle:
    """A vehicle: ``plan`` options by their long names (``move-m``, ``slip``, ...)."""

    name: str
    options: tuple[tuple[str, object], ...] = ()


@dataclass(frozen=True)
class DriftCase:
    """A drift case: the planning drift scale and a turn of every drift zone's bearing."""

    name: str
    scale: float = 1.0
    bearing_change_deg: float = 0.0


@dataclass(frozen=True)
class Scenario:
    """One plan of the campaign: a pair, a vehicle and a drift case."""

    pair: Pair
    vehicle: Vehicle
    drift: DriftCase

    @property
    def name(self) -> str:
        """'pair / vehicle / drift case'."""
        return f"{self.pair.name} / {self.vehicle.name} / {self.drift.name}"


@dataclass(frozen=True)
class Campaign:
    """A campaign file read and its scenarios expanded (option values not yet checked)."""

    path: Path
    sha256: str
    site_path: Path
    seed: int
    risk_limit: float
    plan_options: dict
    pairs: tuple[Pair, ...]
    vehicles: tuple[Vehicle, ...]
    drifts: tuple[DriftCase, ...]
    scenarios: tuple[Scenario, ...]


def _refuse(path, text: str) -> CampaignError:
    return CampaignError(f"{path}: {text}")


def _read_bytes(path: Path, what: str) -> bytes:
    try:
        if path.stat().st_size > MAX_CAMPAIGN_BYTES:
            raise CampaignError(f"{path}: over {MAX_CAMPAIGN_BYTES:,} bytes; not a {what}")
        return path.read_bytes()
    except OSError as err:
        raise CampaignError(f"{path}: {err.strerror or err}") from err


def _name(path, value, where: str) -> str:
    from planner.names import clean_name

    if not isinstance(value, str):
        raise _refuse(path, f"{where}: name must be text, got {value!r}")
    try:
        return clean_name(value, where)
    except PlannerError as err:
        raise _refuse(path, str(err)) from err


def _number(path, value, where: str, *, low: float | None = None, high: float | None = None) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise _refuse(path, f"{where} must be a finite number, got {value!r}")
    if (low is not None and value < low) or (high is not None and value > high):
        raise _refuse(path, f"{where} must be in [{low if low is not None else '-inf'}, "
                            f"{high if high is not None else 'inf'}], got {value!r}")
    return float(value)


def _place(path, value, where: str) -> tuple[float, float] | str:
    """A start or goal: [lon, lat] or a feature name."""
    if isinstance(value, str):
        return _name(path, value, where)
    if (isinstance(value, list) and len(value) == 2
            and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)):
        lon, lat = (float(v) for v in value)
        if not (math.isfinite(lon) and math.isfinite(lat) and -180 <= lon <= 180 and -90 <= lat <= 90):
            raise _refuse(path, f"{where} = {value!r} is not a lon/lat position in degrees")
        return lon, lat
    raise _refuse(path, f"{where} must be [lon, lat] or the name of a site feature, got {value!r}")


def _entries(path, table: dict, key: str, allowed) -> list[dict]:
    value = table.get(key)
    if value is None:
        return []
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        raise _refuse(path, f"{key} must be an array of tables ([[{key}]])")
    for k, entry in enumerate(value):
        for inner in entry:
            if inner not in allowed:
                raise _refuse(path, f"{key}[{k}]: unknown key {inner!r} (known: {', '.join(allowed)})")
    return value


def _unique(path, items, what: str):
    seen = {}
    for item in items:
        folded = item.name.casefold()
        if folded in seen:
            raise _refuse(path, f"{what} name {item.name!r} is given twice")
        seen[folded] = item
    return tuple(items)


def _read_ensemble(path: Path, given: str, where: str) -> list[DriftCase]:
    """Drift cases from a CSV file with a header ``name,scale,bearing-change-deg``."""
    ensemble = (path.parent / given) if not Path(given).is_absolute() else Path(given)
    data = _read_bytes(ensemble, "drift ensemble file")
    try:
        rows = list(csv.DictReader(io.StringIO(data.decode("utf-8"))))
    except (UnicodeDecodeError, csv.Error) as err:
        raise _refuse(ensemble, f"not a CSV file ({err})") from err
    out = []
    for k, row in enumerate(rows, start=2):
        unknown = set(row) - {"name", "scale", "bearing-change-deg"}
        if unknown or "name" not in row or "scale" not in row:
            raise _refuse(ensemble, f"line {k}: columns must be name, scale and optionally bearing-change-deg")
        try:
            scale = float(row["scale"])
            turn = float(row.get("bearing-change-deg") or 0.0)
        except (TypeError, ValueError) as err:
            raise _refuse(ensemble, f"line {k}: scale and bearing-change-deg must be numbers") from err
        out.append(DriftCase(name=_name(ensemble, row["name"], f"line {k} name"),
                             scale=_number(ensemble, scale, f"line {k} scale", low=0.0),
                             bearing_change_deg=_number(ensemble, turn, f"line {k} bearing-change-deg",
                                                        low=-360.0, high=360.0)))
    if not out:
        raise _refuse(ensemble, f"{where}: the ensemble file has no members")
    return out


def read_campaign(path) -> Campaign:
    """Read a campaign file and expand its scenarios; every structural error names its key.

    Raises
    ------
    CampaignError
        An unknown key, an empty axis, a name given twice, a value of the wrong kind,
        a scenario listed twice or naming an entry that does not exist.
    """
    path = Path(path)
    data = _read_bytes(path, "campaign file")
    try:
        table = tomllib.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as err:
        raise _refuse(path, f"not a TOML file ({err})") from err
    for key in table:
        if key not in TOP_KEYS:
            raise _refuse(path, f"unknown key {key!r} (known: {', '.join(TOP_KEYS)})")
    site = table.get("site")
    if not isinstance(site, str) or not site:
        raise _refuse(path, "site must name the site file (a path relative to the campaign file)")
    site_path = Path(site) if Path(site).is_absolute() else path.parent / site
    seed = table.get("seed")
    if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed < 2**63:
        raise _refuse(path, f"seed must be a whole number in [0, 2**63), got {seed!r}: a campaign is "
                            "always seeded, so a rerun makes the same runs")
    risk_limit = _number(path, table.get("risk-limit", DEFAULT_RISK_LIMIT), "risk-limit", low=0.0, high=1.0)
    expand = table.get("expand", "product")
    if expand not in ("product", "list"):
        raise _refuse(path, f"expand must be \"product\" or \"list\", got {expand!r}")
    plan_options = table.get("plan", {})
    if not isinstance(plan_options, dict):
        raise _refuse(path, "plan must be a table of plan's options ([plan])")
    for key in CAMPAIGN_SET_OPTIONS:
        if key in plan_options or any(isinstance(v, dict) and key in v for v in plan_options.values()):
            raise _refuse(path, f"[plan] {key!r} is set by the campaign (drift cases and the campaign seed)")

    pairs = []
    for k, entry in enumerate(_entries(path, table, "pairs", PAIR_KEYS)):
        for key in PAIR_KEYS:
            if key not in entry:
                raise _refuse(path, f"pairs[{k}]: {key!r} is missing")
        name = _name(path, entry["name"], f"pairs[{k}]")
        pairs.append(Pair(name=name, start=_place(path, entry["start"], f"pair {name!r} start"),
                          goal=_place(path, entry["goal"], f"pair {name!r} goal")))
    vehicles = []
    for k, entry in enumerate(_entries(path, table, "vehicles", ("name", *VEHICLE_OPTIONS))):
        if "name" not in entry:
            raise _refuse(path, f"vehicles[{k}]: 'name' is missing")
        name = _name(path, entry["name"], f"vehicles[{k}]")
        vehicles.append(Vehicle(name=name, options=tuple((key, v) for key, v in entry.items() if key != "name")))
    drifts = []
    for k, entry in enumerate(_entries(path, table, "drifts", DRIFT_KEYS)):
        if "ensemble" in entry:
            if set(entry) != {"ensemble"}:
                raise _refuse(path, f"drifts[{k}]: an ensemble entry holds only 'ensemble' (its members are rows)")
            if not isinstance(entry["ensemble"], str):
                raise _refuse(path, f"drifts[{k}]: ensemble must name a CSV file")
            drifts += _read_ensemble(path, entry["ensemble"], f"drifts[{k}]")
            continue
        if "name" not in entry:
            raise _refuse(path, f"drifts[{k}]: 'name' is missing")
        name = _name(path, entry["name"], f"drifts[{k}]")
        drifts.append(DriftCase(
            name=name, scale=_number(path, entry.get("scale", 1.0), f"drift {name!r} scale", low=0.0),
            bearing_change_deg=_number(path, entry.get("bearing-change-deg", 0.0),
                                       f"drift {name!r} bearing-change-deg", low=-360.0, high=360.0)))
    for key, axis in (("pairs", pairs), ("vehicles", vehicles), ("drifts", drifts)):
        if not axis:
            raise _refuse(path, f"{key} is empty: give at least one [[{key}]] entry")
    pairs = _unique(path, pairs, "pair")
    vehicles = _unique(path, vehicles, "vehicle")
    drifts = _unique(path, drifts, "drift case")

    listed = _entries(path, table, "scenarios", SCENARIO_KEYS)
    if expand == "product":
        if listed:
            raise _refuse(path, "scenarios are listed but expand is \"product\"; set expand = \"list\"")
        scenarios = [Scenario(p, v, d) for p in pairs for v in vehicles for d in drifts]
    else:
        if not listed:
            raise _refuse(path, "scenarios is empty: expand = \"list\" needs [[scenarios]] entries")
        by = {"pair": {p.name: p for p in pairs}, "vehicle": {v.name: v for v in vehicles},
              "drift": {d.name: d for d in drifts}}
        scenarios = []
        for k, entry in enumerate(listed):
            chosen = {}
            for key in SCENARIO_KEYS:
                if key not in entry:
                    raise _refuse(path, f"scenarios[{k}]: {key!r} is missing")
                if entry[key] not in by[key]:
                    raise _refuse(path, f"scenarios[{k}]: {key} {entry[key]!r} is not one of the campaign's "
                                        f"{key}s ({', '.join(sorted(by[key]))})")
                chosen[key] = by[key][entry[key]]
            scenarios.append(Scenario(chosen["pair"], chosen["vehicle"], chosen["drift"]))
        names = [s.name for s in scenarios]
        for k, name in enumerate(names):
            if name in names[:k]:
                raise _refuse(path, f"scenarios[{k}]: scenario {name!r} is listed twice")
    if len(scenarios) > MAX_SCENARIOS:
        raise _refuse(path, f"expands to {len(scenarios):,} scenarios, over the limit of {MAX_SCENARIOS:,}")
    return Campaign(path=path, sha256=hashlib.sha256(data).hexdigest(), site_path=site_path, seed=seed,
                    risk_limit=risk_limit, plan_options=plan_options, pairs=pairs, vehicles=vehicles,
                    drifts=drifts, scenarios=tuple(scenarios))


# ----------------------------------------------------------------------------- scenario sites


def _feature_named(obj: dict, name: str):
    for feature in obj.get("features", ()):
        props = feature.get("properties") or {}
        if props.get("name") == name:
            return feature
    return None


def _rotated(bearing: float, turn: float) -> float:
    return float(round((bearing + turn) % 360.0, 9))


def scenario_site_bytes(site_obj: dict, pair: Pair, drift: DriftCase, where: str) -> bytes:
    """The site file of a pair and drift case: the site with the pair's start and goal.

    The site's own start and goal features are replaced (named '<pair>: start' and
    '<pair>: goal'); a start named after a site feature is that feature's
    representative point, a goal takes the feature's geometry. Every drift zone's
    bearing is turned by the drift case's ``bearing_change_deg``.
    """
    import copy

    import shapely.geometry

    obj = copy.deepcopy(site_obj)
    places = {}
    for role, place in (("start", pair.start), ("goal", pair.goal)):
        if isinstance(place, str):
            found = _feature_named(site_obj, place)
            if found is None or not isinstance(found.get("geometry"), dict):
                raise CampaignError(f"{where}: pair {pair.name!r} {role}: the site has no feature named {place!r}")
            geometry = found["geometry"]
            if role == "start" and geometry.get("type") != "Point":
                try:
                    p = shapely.geometry.shape(geometry).representative_point()
                except (ValueError, TypeError, AttributeError) as err:
                    raise CampaignError(f"{where}: pair {pair.name!r} start: feature {place!r} has no usable "
                                        f"geometry ({err})") from err
                geometry = {"type": "Point", "coordinates": [p.x, p.y]}
            places[role] = copy.deepcopy(geometry)
        else:
            places[role] = {"type": "Point", "coordinates": [place[0], place[1]]}
    features = []
    for feature in obj.get("features", ()):
        props = (feature.get("properties") or {}) if isinstance(feature, dict) else {}
        role = props.get("role")
        if role in ("start", "goal"):
            continue
        if role == "drift" and drift.bearing_change_deg:
            for key in ("toward_deg", "from_deg"):
                if isinstance(props.get(key), (int, float)) and not isinstance(props.get(key), bool):
                    props[key] = _rotated(props[key], drift.bearing_change_deg)
        features.append(feature)
    for role in ("start", "goal"):
        features.append({"type": "Feature", "properties": {"role": role, "name": f"{pair.name}: {role}"},
                         "geometry": places[role]})
    obj["features"] = features
    return (json.dumps(obj, ensure_ascii=False, allow_nan=False, indent=1) + "\n").encode("utf-8")


# ----------------------------------------------------------------------------- identity and seeds


#: Settings recorded for provenance only: not part of a scenario's identity.
PROVENANCE_SETTINGS = ("seed", "settings_file", "settings_sha256")


def scenario_identity(site_sha256: str, settings_record: dict) -> str:
    """The scenario's identity: SHA-256 over its site bytes' hash and its settings (not the seed).

    >>> a = scenario_identity("ab" * 32, {"rollouts": 300, "seed": 1})
    >>> a == scenario_identity("ab" * 32, {"rollouts": 300, "seed": 2}), a == scenario_identity("ab" * 32, {})
    (True, False)
    """
    plain = {k: v for k, v in settings_record.items() if k not in PROVENANCE_SETTINGS}
    text = json.dumps({"site_sha256": site_sha256, "settings": plain}, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def scenario_seed(campaign_seed: int, identity: str) -> int:
    """The scenario's root seed, in [0, 2**128): from the campaign seed and the scenario's identity.

    A :class:`numpy.random.SeedSequence` with the campaign seed as entropy and the
    identity's first 128 bits as spawn key, so it is the same whatever order the
    scenarios run in and however many workers share them.

    >>> scenario_seed(7, "00" * 32) == scenario_seed(7, "00" * 32) != scenario_seed(8, "00" * 32)
    True
    """
    key = tuple(int(identity[i:i + 8], 16) for i in range(0, 32, 8))
    words = np.random.SeedSequence(entropy=campaign_seed, spawn_key=key).generate_state(4, np.uint32)
    return sum(int(w) << (32 * k) for k, w in enumerate(words))


def folder_name(scenario: Scenario, identity: str) -> str:
    """A scenario's run folder name: its names in plain letters and its identity's first 10 digits."""
    slug = re.sub(r"[^a-z0-9]+", "-", scenario.name.casefold()).strip("-")[:60] or "scenario"
    return f"{slug}-{identity[:10]}"


# ----------------------------------------------------------------------------- jobs and running


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
    :class:`~planner.runfolder.PlanSettings` from ``site_of(crs, fix)``, its site,
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
            slug = re.sub(r"[^a-z0-9]+", "-", scenario.pair.name.casefold()).strip("-")[:40] or "pair"
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
            check_drift_scales(grid, settings.dynamics, "--plan-drift", (settings.dynamics.drift_scale,))
            check_drift_scales(grid, settings.dynamics, "--table-drifts", settings.drift_scales)
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


def run_job(job: Job, out_dir: str, site_path: str, prepared: Prepared | None = None) -> dict:
    """Run one scenario into ``out_dir/runs/FOLDER`` (or find it finished): its outcome as plain data.

    Runs on a Dask worker. A failure is caught and returned with its one-line message,
    so the other scenarios go on; nothing is left half-written (the run folder's own
    transaction).
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
            if finished(folder, job, site_sha256):
                outcome["status"] = "skipped"
            else:
                check_out(folder, force=True)
                if prepared is None:
                    prepared = prepare(job.site_bytes, site_path, job.settings)
                result = compute_plan(site_path, job.settings, Progress(), site=prepared.site, grid=prepared.grid)
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
            raise CampaignError(f"--scheduler {scheduler}: cannot reach a Dask scheduler there "
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
    once each and handed to every scenario that uses them; without, every scenario
    loads and rasterises its own (the benchmark's comparison). ``on_outcome`` is
    called as each scenario finishes. Outcomes come back in the campaign's order.
    """
    from distributed import as_completed

    started = time.perf_counter()
    out_dir = Path(out_dir).resolve()  # workers may run in another folder (or on another machine)
    site_paths = write_sites(plan, out_dir)
    (Path(out_dir) / RUNS_DIR).mkdir(exist_ok=True)
    shared = {}
    futures = {}
    for job in plan.jobs:
        source = str(site_paths[job.site_key])
        given = None
        if share:
            key = grid_key(job.site_key, job.settings)
            if key not in shared:
                item = plan.prepared[key]
                # the scenario's site file is the one its run folder names as its input
                item = Prepared(site=dataclasses.replace(item.site, source=source), grid=item.grid)
                shared[key] = client.scatter(item, hash=False)
            given = shared[key]
        futures[client.submit(run_job, job, str(out_dir), source, given, pure=False,
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
