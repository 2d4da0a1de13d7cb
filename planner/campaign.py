"""Trial campaigns: many plans of one site at once, on this machine or a Dask cluster.

A campaign file (TOML) names one site and the axes of its scenarios: start/goal pairs,
vehicles and drift cases. Every scenario is one ``plan`` of the site with its pair's
start and goal, its vehicle's options and its drift case, run through the same public
functions as ``plan`` (:func:`planner.pipeline.compute_plan`, :func:`write_run`), so
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

This module reads and checks the file's structure, expands its scenarios, writes each
scenario's site file (the site with its pair's start and goal and its drift case's
bearings), and gives each scenario an identity (a hash of its site bytes and
settings) and a seed drawn from the campaign seed and that identity (so results do
not depend on the number of workers or the order of execution). Option values are
checked by ``plan``'s own option types in :mod:`planner.cli.campaign_commands`;
:mod:`planner.campaign_jobs` checks every scenario into a job and runs the jobs on
Dask distributed, and :mod:`planner.campaign_report` reports their outcomes.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from planner.errors import PlannerError

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


def name_slug(name: str, limit: int, empty: str) -> str:
    """A name in plain lower-case letters, digits and hyphens, at most ``limit`` characters, for file names.

    >>> name_slug("Pad 2 / Quad: calm", 60, "scenario"), name_slug("--", 60, "scenario")
    ('pad-2-quad-calm', 'scenario')
    """
    return re.sub(r"[^a-z0-9]+", "-", name.casefold()).strip("-")[:limit] or empty


def folder_name(scenario: Scenario, identity: str) -> str:
    """A scenario's run folder name: its names in plain letters and its identity's first 10 digits."""
    slug = name_slug(scenario.name, 60, "scenario")
    return f"{slug}-{identity[:10]}"
