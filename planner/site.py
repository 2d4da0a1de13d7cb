"""Site loading: a GeoJSON site file becomes a validated :class:`Site` in metres.

This stage owns the site-file schema (roles and their properties), every rule the
schema imposes, and the working frame (a local transverse Mercator centred on the
boundary, or a projected metric CRS the user names). Nothing is repaired silently:
an invalid polygon is an error naming the feature unless ``fix=True``.

The module is long on purpose: the schema's rules are one list, checked in one pass
with one way of naming a feature, so a rule cannot be missed by one reader and kept
by another. What a legacy ``crs`` member means is in :mod:`planner.crs_member`;
formats other than GeoJSON and merging are in :mod:`planner.gis`.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import math
import os
import re
import stat
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import shapely
from shapely.geometry import MultiPolygon, Point, Polygon

from planner import checks
from planner.crs_member import crs_member_transform, reproject_positions
from planner.errors import SettingsError, SiteError, SiteWarning
from planner.names import check_unique, clean_name, file_key

#: Largest site file read, in bytes, unless the caller raises it.
DEFAULT_MAX_BYTES = 50_000_000
#: Polygons smaller than this (square metres) are degenerate: collinear or repeated points.
MIN_AREA_M2 = 1e-4
#: Upper bounds that keep every cost finite and every drift inside a yard-sized grid:
#: a rough zone costing more than this should be a hazard; a penalty above this
#: swamps every route; distances above this are larger than any test yard.
MAX_COST_FACTOR = 1000.0
MAX_PENALTY_M = 1e6
MAX_DISTANCE_M = 10_000.0
#: Drift of more than this many metres per metre travelled is no drift but a current
#: that carries the vehicle: refuse it as a drawing mistake (also bounds the spread).
MAX_DRIFT_PER_M = 10.0
#: Largest number of vertices accepted in one feature.
MAX_VERTICES_PER_FEATURE = 200_000

#: What a site file in another coordinate system should do.
REPROJECT_ADVICE = ("reproject the file to WGS 84 longitude/latitude (EPSG:4326) in a GIS editor and save it "
                    "again; load_site.crs only chooses the working frame")
#: Names a legacy GeoJSON ``crs`` member may give for WGS 84 lon/lat.
LONLAT_CRS_NAMES = ("urn:ogc:def:crs:ogc:1.3:crs84", "urn:ogc:def:crs:ogc::crs84", "crs84", "ogc:crs84",
                    "epsg:4326", "urn:ogc:def:crs:epsg::4326", "urn:ogc:def:crs:epsg:6.6:4326")
#: Scale distortion of the working frame above which a site warns (1 part in 1000).
MAX_SCALE_DISTORTION = 1e-3
#: A site wider or taller than this is no test yard: its coordinates are probably not lon/lat degrees.
MAX_SITE_M = 50_000.0

#: Outcome names of the risk table; a hazard may not take one.
RESERVED_NAMES = ("none", "goal", "boundary", "incident", "never")
ROLES = ("boundary", "hazard", "rough", "drift", "start", "goal")
ZONE_ROLES = ("hazard", "rough", "drift")

_POLYGONAL = ("Polygon", "MultiPolygon")
#: Version of the site-file schema this code reads (top-level ``properties.site_schema``).
SITE_SCHEMA = 2
#: Properties of earlier schemas that are refused, and what replaced them.
REPLACED_PROPERTIES = {
    "push_m": "'drift_per_m' (metres of drift per metre travelled, a ratio; schema 2 states drift "
              "per metre, not per move)",
    "spread_m": "'spread_per_sqrt_m' (standard deviation in metres after 1 m of travel, growing with "
                "the square root of the distance; schema 2 states spread per metre, not per move)",
}
_GEOMETRY_TYPES = {
    "boundary": _POLYGONAL,
    "hazard": _POLYGONAL,
    "rough": _POLYGONAL,
    "drift": _POLYGONAL,
    "start": ("Point",),
    "goal": ("Point", "Polygon"),
}
_PROPERTIES = {
    "boundary": {"role", "name"},
    "hazard": {"role", "name", "ends_run", "penalty_m", "buffer_m"},
    "rough": {"role", "name", "cost_factor"},
    "drift": {"role", "name", "toward_deg", "from_deg", "drift_per_m", "spread_per_sqrt_m", "chance"},
    "start": {"role", "name"},
    "goal": {"role", "name"},
}


@dataclass(frozen=True)
class Zone:
    """One hazard, rough or drift zone, in the working frame (metres).

    ``geometry`` is the true polygon; ``buffered`` adds ``buffer_m`` (hazards only).
    ``toward_deg`` is always the direction the drift pushes toward (clockwise from
    true north), whichever convention the file used; ``grid_toward_deg`` is the same
    direction measured from the working frame's grid north (the meridian convergence
    at the zone removed). ``drift_per_m`` is metres of displacement per metre
    travelled, ``spread_per_sqrt_m`` the standard deviation in metres after one
    metre of travel (it grows with the square root of the distance).
    """

    feature: int
    name: str
    role: str
    geometry: Polygon | MultiPolygon
    buffered: Polygon | MultiPolygon
    ends_run: bool = True
    penalty_m: float | None = None
    buffer_m: float = 0.0
    cost_factor: float = 1.0
    toward_deg: float = 0.0
    drift_per_m: float = 0.0
    spread_per_sqrt_m: float = 0.0
    chance: float = 1.0
    grid_toward_deg: float = 0.0
    #: Where the zone was drawn, when site files were merged: ``hazards.gpkg layer 'hazard':
    #: feature 2 ('North pond')`` (``feature`` is then its index in the merged collection).
    drawn_in: str = field(default="", compare=False)

    @property
    def label(self) -> str:
        """How messages name this zone: ``feature 3 ('North pond')``."""
        return self.drawn_in or f"feature {self.feature} ({self.name!r})"

    def drift_vector(self) -> tuple[float, float]:
        """Drift as (east, north) metres per metre travelled in the working frame (``chance`` aside)."""
        rad = math.radians(self.grid_toward_deg)
        return (self.drift_per_m * math.sin(rad), self.drift_per_m * math.cos(rad))


@functools.lru_cache(maxsize=16)
def _transformer_for(crs: str, inverse: bool):
    """One pyproj transformer per frame and direction.

    Making one costs far more than using it, and a site has a feature per zone.
    """
    from pyproj import CRS, Transformer

    src, dst = CRS.from_epsg(4326), CRS.from_user_input(crs)
    if inverse:
        src, dst = dst, src
    return Transformer.from_crs(src, dst, always_xy=True)


@dataclass(frozen=True)
class Frame:
    """The working frame: pyproj CRS text plus forward/inverse transforms.

    ``kind`` is ``"local-tmerc"`` for the automatic frame or ``"named"`` for a CRS
    the user gave.
    """

    crs: str
    kind: str
    lon_0: float
    lat_0: float

    def _transformer(self, inverse: bool):
        return _transformer_for(self.crs, inverse)

    def to_xy(self, lon, lat) -> tuple[np.ndarray, np.ndarray]:
        """Project lon/lat degrees to east/north metres (arrays in, arrays out)."""
        x, y = self._transformer(False).transform(np.asarray(lon, float), np.asarray(lat, float))
        x, y = np.asarray(x, float), np.asarray(y, float)
        if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
            raise SiteError(f"coordinates cannot be projected into the working frame {self.crs}")
        return x, y

    def to_lonlat(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Unproject east/north metres to lon/lat degrees (arrays in, arrays out)."""
        lon, lat = self._transformer(True).transform(np.asarray(x, float), np.asarray(y, float))
        lon, lat = np.asarray(lon, float), np.asarray(lat, float)
        if not (np.all(np.isfinite(lon)) and np.all(np.isfinite(lat))):
            raise SiteError("coordinates cannot be taken back to lon/lat")
        return lon, lat

    def meridian_convergence_deg(self, lon: float, lat: float) -> float:
        """Angle from true north to grid north at a point, degrees (grid bearing = true - this)."""
        from pyproj import CRS, Proj

        value = float(Proj(CRS.from_user_input(self.crs)).get_factors(lon, lat).meridian_convergence)
        if not math.isfinite(value):
            raise SiteError(f"the working frame has no meridian convergence at lon {lon:.6f}, lat {lat:.6f}")
        return value

    def scale_distortion(self, lon, lat) -> float:
        """Largest |k - 1| of the frame's point scale over the given points."""
        from pyproj import CRS, Proj

        proj = Proj(CRS.from_user_input(self.crs))
        factors = proj.get_factors(np.asarray(lon, float), np.asarray(lat, float))
        k = np.concatenate([np.atleast_1d(factors.meridional_scale), np.atleast_1d(factors.parallel_scale)])
        return float(np.max(np.abs(k - 1.0)))


@dataclass(frozen=True)
class Site:
    """A validated site in the working frame.

    Attributes
    ----------
    boundary : shapely Polygon or MultiPolygon, metres.
    start : shapely Point, metres.
    goal : shapely Point or Polygon, metres.
    zones : hazards, rough and drift zones in file order.
    scale_distortion : largest |k - 1| of the frame over the boundary.
    """

    name: str
    source: str
    sha256: str
    frame: Frame
    boundary: Polygon | MultiPolygon
    start: Point
    goal: Point | Polygon
    start_name: str
    goal_name: str
    zones: tuple[Zone, ...]
    scale_distortion: float
    warnings: tuple[str, ...] = field(default=())
    #: The site file's bytes as read (empty for a site built from a value in memory).
    data: bytes = field(default=b"", repr=False, compare=False)
    #: Things said about how the file was read that are no warning (a legacy ``crs``
    #: member naming WGS 84, a reprojection from the CRS the file names).
    notes: tuple[str, ...] = field(default=())
    #: Every input file with the SHA-256 of its bytes, as ``(path, sha256)`` pairs (one
    #: for a single GeoJSON file; several when site files were merged).
    inputs: tuple[tuple[str, str], ...] = field(default=())

    @property
    def hazards(self) -> tuple[Zone, ...]:
        """The hazard zones, in file order."""
        return tuple(z for z in self.zones if z.role == "hazard")

    @property
    def rough(self) -> tuple[Zone, ...]:
        """The rough-ground zones, in file order."""
        return tuple(z for z in self.zones if z.role == "rough")

    @property
    def drifts(self) -> tuple[Zone, ...]:
        """The drift zones, in file order."""
        return tuple(z for z in self.zones if z.role == "drift")

    @property
    def centre_lonlat(self) -> tuple[float, float]:
        """Longitude and latitude (degrees, WGS 84) of the centre of the boundary's lon/lat box."""
        return (self.frame.lon_0, self.frame.lat_0)

    @property
    def extent_m(self) -> tuple[float, float]:
        """Width (east) and height (north) of the boundary's bounding box, metres."""
        x0, y0, x1, y1 = self.boundary.bounds
        return (x1 - x0, y1 - y0)


# ----------------------------------------------------------------------------- reading


class _Object(dict):
    """A JSON object that remembers keys it saw more than once (JSON itself keeps the last)."""

    repeated: tuple[str, ...] = ()


def _object_pairs(pairs) -> _Object:
    obj = _Object(pairs)
    if len(obj) != len(pairs):
        seen: set[str] = set()
        obj.repeated = tuple(k for k, _ in pairs if k in seen or seen.add(k))
    return obj


def _refuse_repeated(obj, where: str) -> None:
    repeated = getattr(obj, "repeated", ())
    if repeated:
        raise SiteError(f"{where}: key {repeated[0]!r} appears more than once (JSON would keep only the last); "
                        "remove the duplicate")


def read_site_bytes(path: str | Path, *, max_bytes: int = DEFAULT_MAX_BYTES) -> bytes:
    """The bytes of a site file, read once, refused by size before reading."""
    path = Path(path)
    checks.whole(max_bytes, "load_site.max_bytes", low=1, says="a positive whole number of bytes")
    try:
        if not stat.S_ISREG(path.stat().st_mode):  # a pipe or device would block or never end
            raise SiteError(f"{path}: not a file")
        with open(path, "rb") as f:
            info = os.fstat(f.fileno())
            if not stat.S_ISREG(info.st_mode):
                raise SiteError(f"{path}: not a file")
            if info.st_size > max_bytes:
                raise SiteError(f"{path}: file is {info.st_size:,} bytes, over the {max_bytes:,}-byte limit "
                                "(raise it with load_site.max_bytes)")
            data = f.read(max_bytes + 1)
    except IsADirectoryError as err:
        raise SiteError(f"{path}: not a file") from err
    except OSError as err:
        raise SiteError(f"{path}: cannot read the site file ({err.strerror or err})") from err
    if len(data) > max_bytes:
        raise SiteError(f"{path}: file grew past the {max_bytes:,}-byte limit while it was read "
                        "(raise it with load_site.max_bytes)")
    return data


def parse_site_bytes(data: bytes, source: str) -> tuple[Any, str]:
    """Parse a site file's bytes; returns the JSON value and the SHA-256 of exactly these bytes."""
    digest = hashlib.sha256(data).hexdigest()
    if not data.strip():
        raise SiteError(f"{source}: file is empty, expected a GeoJSON FeatureCollection")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise SiteError(f"{source}: not a text file (byte {err.start} is not UTF-8); expected GeoJSON") from err
    try:
        obj = json.loads(text, parse_constant=_refuse_constant, object_pairs_hook=_object_pairs,
                         parse_int=_whole_number)
    except RecursionError as err:
        raise SiteError(f"{source}: JSON is nested too deeply to be a site file") from err
    except json.JSONDecodeError as err:
        raise SiteError(f"{source}: not valid JSON (line {err.lineno}, column {err.colno}: {err.msg})") from err
    except ValueError as err:
        raise SiteError(f"{source}: {err}") from err
    return obj, digest


def read_site_text(path: str | Path, *, max_bytes: int = DEFAULT_MAX_BYTES) -> tuple[Any, str]:
    """Read and parse a site file, refusing it by size before parsing.

    Returns the parsed JSON and the SHA-256 of the file's bytes.
    """
    return parse_site_bytes(read_site_bytes(path, max_bytes=max_bytes), str(path))


def _whole_number(text: str) -> int | float:
    """A JSON integer, or an infinity for one too long to be any coordinate or property.

    The property's own check then refuses the infinity naming the feature (``int()``
    would fail unnamed).
    """
    if len(text) > 400:
        return -math.inf if text.startswith("-") else math.inf
    return int(text)


def _check_schema(obj: dict, source: str) -> None:
    """The top-level ``properties.site_schema``, when given, must be the one this code reads."""
    top = obj.get("properties")
    if top is None:
        return
    if not isinstance(top, dict):
        raise SiteError(f"{source}: top-level 'properties' must be an object")
    if "site_schema" not in top or top["site_schema"] is None:
        return
    version = top["site_schema"]
    if isinstance(version, bool) or not isinstance(version, int):
        raise SiteError(f"{source}: 'site_schema' must be a whole number, got {version!r:.40}")
    if version < SITE_SCHEMA:
        raise SiteError(f"{source}: site_schema {version} states drift per move; this veerwise reads schema "
                        f"{SITE_SCHEMA} (drift_per_m and spread_per_sqrt_m per metre travelled): convert the "
                        "drift zones and set site_schema to 2")
    if version > SITE_SCHEMA:
        raise SiteError(f"{source}: site_schema {version} is newer than this veerwise reads ({SITE_SCHEMA}); "
                        "upgrade veerwise")


def _grid_bearing(frame: Frame, geom, toward_deg: float) -> float:
    """A true bearing at a zone as a bearing from the frame's grid north.

    The local frame is centred on the site, where its convergence is nil; a named CRS
    turns true into grid bearings by the meridian convergence at the zone's
    representative point (pyproj ``Proj.get_factors``).
    """
    if frame.kind != "named":
        return toward_deg
    p = geom.representative_point()
    lon, lat = frame.to_lonlat([p.x], [p.y])
    return float((toward_deg - frame.meridian_convergence_deg(lon[0], lat[0])) % 360.0)


def _refuse_constant(name: str):
    raise ValueError(f"JSON contains {name}, which GeoJSON does not allow")


def load_site(
    path: str | Path,
    *,
    crs: str | None = None,
    fix: bool = False,
    max_bytes: int = DEFAULT_MAX_BYTES,
) -> Site:
    """Load and validate a site file.

    Parameters
    ----------
    path : site file (GeoJSON FeatureCollection, WGS 84 lon/lat).
    crs : a projected metric CRS to work in (``"EPSG:32631"``); default is a local
        transverse Mercator centred on the boundary.
    fix : repair invalid polygons with ``shapely.make_valid`` (with a warning).
    max_bytes : refuse larger files before parsing.

    Raises
    ------
    SiteError
        Naming the feature (index and name) and the rule it breaks.
    """
    return site_from_bytes(read_site_bytes(path, max_bytes=max_bytes), source=str(path), crs=crs, fix=fix)


def site_from_bytes(data: bytes, *, source: str, crs: str | None = None, fix: bool = False,
                    origins: list | None = None, notes: tuple[str, ...] = (),
                    inputs: tuple[tuple[str, str], ...] | None = None) -> Site:
    """Validate a site file's bytes.

    The :class:`Site` keeps them (``data``) with their hash, so what is copied is
    exactly what was hashed and read. ``origins`` (one ``(file and layer, index
    there)`` per feature) and ``notes`` come from a merge of several site files
    (:mod:`planner.gis`); ``inputs`` lists the files read, by default ``source``.
    """
    obj, digest = parse_site_bytes(data, source)
    try:
        site = _build_site(obj, crs=crs, fix=fix, source=source, sha256=digest, origins=origins, notes=notes)
    except RecursionError as err:
        raise SiteError(f"{source}: coordinates are nested too deeply") from err
    return dataclasses.replace(site, data=data, inputs=((source, digest),) if inputs is None else inputs)


def site_from_geojson(
    obj: Any,
    *,
    crs: str | None = None,
    fix: bool = False,
    source: str = "<memory>",
    sha256: str | None = None,
) -> Site:
    """Validate a parsed GeoJSON object and build the :class:`Site`.

    ``source`` only names the input in messages; ``sha256`` defaults to the hash of
    the canonical JSON text of ``obj``.
    """
    if sha256 is None:
        try:
            canon = json.dumps(obj, sort_keys=True, separators=(",", ":"))
        except (TypeError, ValueError) as err:
            raise SiteError(f"{source}: not JSON-serialisable ({err})") from err
        sha256 = hashlib.sha256(canon.encode()).hexdigest()
    try:
        return _build_site(obj, crs=crs, fix=fix, source=source, sha256=sha256)
    except RecursionError as err:
        raise SiteError(f"{source}: coordinates are nested too deeply") from err


def _build_site(obj, *, crs, fix, source, sha256, origins=None, notes=()) -> Site:
    features, read_notes = lonlat_features(obj, source)
    notes = (*notes, *read_notes)
    if origins is not None and len(origins) != len(features):
        raise SiteError(f"{source}: {len(origins)} feature origins for {len(features)} features")
    parsed = [_parse_feature(i, f, source, None if origins is None else origins[i]) for i, f in enumerate(features)]

    by_role: dict[str, list] = {r: [] for r in ROLES}
    for item in parsed:
        by_role[item["role"]].append(item)
    for role in ("boundary", "start", "goal"):
        found = by_role[role]
        if not found:
            raise SiteError(f"{source}: no feature with role '{role}' (exactly one is required)")
        if len(found) > 1:
            a, b = found[0], found[1]
            raise SiteError(
                f"{source}: {len(found)} features with role '{role}' "
                f"({a['label']} and {b['label']}); exactly one is required"
            )
    reserved = {file_key(r) for r in RESERVED_NAMES}
    seen: dict[str, str] = {}
    drawn: dict[str, str] = {}
    for item in parsed:
        if item["role"] == "hazard" and file_key(item["name"]) in reserved:
            raise SiteError(f"{item['where']}: hazard name {item['name']!r} is reserved "
                            f"({', '.join(RESERVED_NAMES)} name outcomes in the risk table); rename it")
        if item["role"] in ZONE_ROLES:
            if item["name"] in seen:
                raise SiteError(
                    f"{item['where']}: zone name {item['name']!r} is already used by {seen[item['name']]}"
                )
            seen[item["name"]] = item["label"]
            # The same zone drawn twice would count twice (two pushes, two entries): refuse it.
            key = json.dumps([item["role"], item["geometry"]], sort_keys=True)
            if key in drawn:
                raise SiteError(f"{item['where']}: repeats the {item['role']} zone {drawn[key]} "
                                "(same geometry); remove one")
            drawn[key] = item["label"]
    check_unique([(item["label"], item["name"]) for item in parsed if item["role"] in ZONE_ROLES], source)

    boundary_item = by_role["boundary"][0]
    lon_b, lat_b = _all_lonlat(boundary_item["geometry"])
    if np.any(np.abs(lat_b) >= 89.5):
        raise SiteError(
            f"{boundary_item['where']}: boundary reaches latitude 89.5 or beyond; "
            "sites at a pole are not supported"
        )
    if lon_b.max() - lon_b.min() > 180.0:
        raise SiteError(
            f"{boundary_item['where']}: boundary spans more than 180 degrees of longitude "
            "(it straddles the antimeridian); split the site or name a load_site.crs that covers it"
        )
    frame = _make_frame(crs, lon_b, lat_b)

    site_warnings: list[str] = []
    geoms = {}
    for item in parsed:
        geoms[item["index"]] = _project_geometry(item, frame, fix, source, site_warnings)

    boundary = geoms[boundary_item["index"]]
    start_item, goal_item = by_role["start"][0], by_role["goal"][0]
    start, goal = geoms[start_item["index"]], geoms[goal_item["index"]]

    zones = []
    for item in parsed:
        if item["role"] not in ZONE_ROLES:
            continue
        geom = geoms[item["index"]]
        props = item["props"]
        buffered = geom.buffer(props.get("buffer_m", 0.0)) if props.get("buffer_m", 0.0) > 0 else geom
        if not boundary.intersects(geom):
            site_warnings.append(f"{item['label']}: lies wholly outside the boundary and has no effect")
        if item["role"] == "drift":
            props = dict(props, grid_toward_deg=_grid_bearing(frame, geom, props["toward_deg"]))
        zones.append(Zone(feature=item["index"], name=item["name"], role=item["role"], geometry=geom,
                          buffered=buffered, drawn_in=item["label"] if origins is not None else "", **props))

    # Strictly inside: a start or goal on the boundary line (or a goal area sharing only
    # an edge with it) has no usable cell, and would be accepted by a sloppier test.
    if not boundary.covers(start):
        raise SiteError(f"{start_item['where']}: start lies outside the boundary")
    if not boundary.contains(start):
        raise SiteError(f"{start_item['where']}: start lies on the boundary's edge; move it strictly "
                        "inside")
    goal_probe = goal if goal.geom_type == "Point" else goal.representative_point()
    if not boundary.intersects(goal):
        raise SiteError(f"{goal_item['where']}: goal lies outside the boundary")
    if not boundary.contains(goal):
        raise SiteError(f"{goal_item['where']}: goal is not strictly inside the boundary (on its edge "
                        "or partly outside); move it inside")
    if start.equals(goal) or (goal.geom_type != "Point" and goal.covers(start)):
        raise SiteError(f"{start_item['where']}: start is at the goal; nothing to plan")
    for z in zones:
        if z.role != "hazard":
            continue
        if z.geometry.covers(start):
            if z.ends_run:
                raise SiteError(f"{start_item['where']}: start lies inside hazard {z.label}")
            site_warnings.append(f"{start_item['label']}: start lies inside hazard {z.label}, which does not end "
                                 "the run; leaving it is charged its penalty")
        elif z.buffered.covers(start) and z.ends_run:
            raise SiteError(
                f"{start_item['where']}: start lies inside the {z.buffer_m:g} m buffer of hazard {z.label}"
            )
        if not z.ends_run:
            continue
        if z.geometry.covers(goal_probe) or (goal.geom_type == "Point" and z.buffered.covers(goal)):
            raise SiteError(f"{goal_item['where']}: goal lies inside hazard {z.label}")
        if goal.geom_type != "Point" and z.buffered.covers(goal):
            raise SiteError(
                f"{goal_item['where']}: goal lies inside the {z.buffer_m:g} m buffer of hazard {z.label}"
            )

    hazards = [z for z in zones if z.role == "hazard"]
    for a, b in _overlapping([z.buffered for z in hazards], hazards):
        if a.ends_run != b.ends_run:
            site_warnings.append(
                f"{a.label} and {b.label} overlap with different ends_run; "
                "cells in the overlap end the run"
            )
    drifts = [z for z in zones if z.role == "drift"]
    for a, b in _overlapping([z.geometry for z in drifts], drifts):
        site_warnings.append(f"drift zones {a.label} and {b.label} overlap; their pushes add as vectors")

    distortion = frame.scale_distortion(lon_b, lat_b)
    x0, y0, x1, y1 = boundary.bounds
    site_warnings += _location_warnings(frame, (x1 - x0, y1 - y0), crs, distortion)
    name = boundary_item["name"]
    for message in site_warnings:
        warnings.warn(message, SiteWarning, stacklevel=2)
    return Site(
        name=name, source=source, sha256=sha256, frame=frame, boundary=boundary, start=start, goal=goal,
        start_name=start_item["name"], goal_name=goal_item["name"], zones=tuple(zones),
        scale_distortion=distortion, warnings=tuple(site_warnings), notes=tuple(notes),
    )


def _overlapping(geometries: list, items: list) -> list[tuple]:
    """Pairs of ``items`` (in file order) whose geometries overlap with positive area.

    Candidates come from one bulk STRtree query, so thousands of small zones cost
    about as much as their number, not its square.
    """
    if len(geometries) < 2:
        return []
    tree = shapely.STRtree(geometries)
    left, right = tree.query(geometries, predicate="intersects")
    keep = left < right
    left, right = left[keep], right[keep]
    if not left.size:
        return []
    areas = shapely.area(shapely.intersection(np.take(geometries, left), np.take(geometries, right)))
    order = np.lexsort((right, left))
    return [(items[left[k]], items[right[k]]) for k in order if areas[k] > 0]


# ----------------------------------------------------------------------------- features


def _parse_feature(index: int, feature: Any, source: str, origin: tuple[str, int] | None = None) -> dict:
    """Check one feature's role, properties and geometry shape (not yet projected).

    ``origin`` (file and layer, index there) names a feature of a merged collection
    by where it was drawn. A property whose value is ``null`` counts as absent: GIS
    editors store a layer as a table, so every feature carries every column.
    """
    prefix, local = (source, index) if origin is None else origin
    where = f"{prefix}: feature {local}"
    if not isinstance(feature, dict) or feature.get("type") != "Feature":
        raise SiteError(f"{where}: not a GeoJSON Feature")
    props = feature.get("properties")
    if not isinstance(props, dict):
        raise SiteError(f"{where}: has no 'properties' object (every feature needs a 'role')")
    raw_name = props.get("name")
    if raw_name is None or (isinstance(raw_name, str) and not raw_name.strip()):
        name = f"#{local}"
    else:
        name = clean_name(raw_name, f"{where} ('#{local}')")
    label = f"feature {local} ({name!r})"
    where = f"{prefix}: {label}"
    if origin is not None:
        label = where
    _refuse_repeated(feature, where)
    _refuse_repeated(props, f"{where} properties")
    _refuse_repeated(feature.get("geometry"), f"{where} geometry")
    props = {k: v for k, v in props.items() if v is not None}
    role = props.get("role")
    if role not in ROLES:
        raise SiteError(f"{where}: unknown role {role!r}; expected one of {', '.join(ROLES)}")
    for old_name, replacement in REPLACED_PROPERTIES.items():
        if role == "drift" and props.get(old_name) is not None:
            raise SiteError(f"{where}: property {old_name!r} (per move) is from site schema 1 and was replaced "
                            f"by {replacement}")
    unknown = sorted(set(props) - _PROPERTIES[role])
    if unknown:
        allowed = ", ".join(sorted(_PROPERTIES[role] - {"role"}))
        raise SiteError(f"{where}: unknown property {unknown[0]!r} for role '{role}' (allowed: {allowed})")
    geometry = _single_part(feature.get("geometry"), role)
    if not isinstance(geometry, dict) or geometry.get("type") not in _GEOMETRY_TYPES[role]:
        found = geometry.get("type") if isinstance(geometry, dict) else geometry
        raise SiteError(
            f"{where}: role '{role}' needs geometry {' or '.join(_GEOMETRY_TYPES[role])}, found {found!r}"
        )
    _check_coordinates(geometry, where)
    return {
        "index": index, "name": name, "label": label, "where": where, "role": role, "geometry": geometry,
        "props": _zone_properties(role, props, where),
    }


def _single_part(geometry, role: str):
    """A one-part MultiPoint or MultiPolygon as its part, where the role needs a single one.

    GIS layers often store every shape as a multi-part one; a start drawn as a
    MultiPoint of one point is that point.
    """
    if not isinstance(geometry, dict) or role not in ("start", "goal"):
        return geometry
    coords = geometry.get("coordinates")
    kind = {"MultiPoint": "Point", "MultiPolygon": "Polygon"}.get(geometry.get("type"))
    if kind is not None and isinstance(coords, list) and len(coords) == 1:
        return {"type": kind, "coordinates": coords[0]}
    return geometry


def _number(props: dict, key: str, where: str, *, default=None, low=None, high=None,
            low_open=False) -> float | None:
    value = props.get(key, default)
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not _finite(value):
        raise SiteError(f"{where}: '{key}' must be a finite number, got {value!r:.40}")
    value = float(value)
    if low is not None and (value < low or (low_open and value == low)):
        rule = f"> {low:g}" if low_open else f">= {low:g}"
        raise SiteError(f"{where}: '{key}' must be {rule}, got {value:g}")
    if high is not None and value > high:
        raise SiteError(f"{where}: '{key}' must be <= {high:g}, got {value:g}")
    return value


def _zone_properties(role: str, props: dict, where: str) -> dict:
    if role == "hazard":
        ends_run = props.get("ends_run", True)
        # a boolean column of a GIS table comes back as 0/1 (or 0.0/1.0 when it has gaps)
        if not isinstance(ends_run, bool) and isinstance(ends_run, (int, float)) and ends_run in (0, 1):
            ends_run = bool(ends_run)
        if not isinstance(ends_run, bool):
            raise SiteError(f"{where}: 'ends_run' must be true or false (or 1 or 0), got {ends_run!r:.40}")
        return {
            "ends_run": ends_run,
            "penalty_m": _number(props, "penalty_m", where, low=0.0, high=MAX_PENALTY_M),
            "buffer_m": _number(props, "buffer_m", where, default=0.0, low=0.0, high=MAX_DISTANCE_M),
        }
    if role == "rough":
        if "cost_factor" not in props:
            raise SiteError(f"{where}: rough zone needs 'cost_factor' (>= 1)")
        return {"cost_factor": _number(props, "cost_factor", where, low=1.0, high=MAX_COST_FACTOR)}
    if role == "drift":
        has_to, has_from = "toward_deg" in props, "from_deg" in props
        if has_to == has_from:
            which = "both" if has_to else "neither"
            raise SiteError(f"{where}: drift zone has {which} of 'toward_deg'/'from_deg'; give exactly one")
        if "drift_per_m" not in props:
            raise SiteError(f"{where}: drift zone needs 'drift_per_m' (>= 0, metres of drift per metre travelled)")
        if has_to:
            toward = _number(props, "toward_deg", where, low=0.0, high=360.0)
        else:
            toward = (_number(props, "from_deg", where, low=0.0, high=360.0) + 180.0) % 360.0
        return {
            "toward_deg": toward % 360.0,
            "drift_per_m": _number(props, "drift_per_m", where, low=0.0, high=MAX_DRIFT_PER_M),
            "spread_per_sqrt_m": _number(props, "spread_per_sqrt_m", where, default=0.0, low=0.0,
                                         high=MAX_DRIFT_PER_M),
            "chance": _number(props, "chance", where, default=1.0, low=0.0, high=1.0),
        }
    return {}


def _check_coordinates(geometry: dict, where: str) -> None:
    """Every position is 2 or 3 finite numbers with lon in [-180, 180], lat in [-90, 90]."""
    coords = geometry.get("coordinates")
    kind = geometry["type"]
    depth = {"Point": 0, "Polygon": 2, "MultiPolygon": 3}[kind]
    count = [0]

    def walk(node, level):
        if level == 0:
            _check_position(node, where)
            count[0] += 1
            if count[0] > MAX_VERTICES_PER_FEATURE:
                raise SiteError(
                    f"{where}: more than {MAX_VERTICES_PER_FEATURE:,} vertices; simplify the outline "
                    "(a site this detailed is finer than any grid cell)"
                )
            return
        if not isinstance(node, list) or not node:
            raise SiteError(f"{where}: {kind} coordinates are malformed (empty or not nested {depth} deep)")
        for child in node:
            walk(child, level - 1)

    walk(coords, depth)
    rings = [coords] if kind == "Polygon" else (coords if kind == "MultiPolygon" else [])
    for polygon in rings:
        for ring in polygon:
            if len(ring) < 4:
                raise SiteError(f"{where}: a polygon ring has {len(ring)} positions; RFC 7946 needs at least 4")
            if list(ring[0][:2]) != list(ring[-1][:2]):
                raise SiteError(f"{where}: a polygon ring is not closed (first and last positions differ)")


def _check_position(pos, where: str, *, lonlat: bool = True) -> None:
    if not isinstance(pos, list) or not 2 <= len(pos) <= 3:
        raise SiteError(f"{where}: a position must be [lon, lat] or [lon, lat, alt], got {pos!r:.60}")
    for v in pos:
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise SiteError(f"{where}: a coordinate is not a number: {v!r:.40}")
        if not _finite(v):
            raise SiteError(f"{where}: a coordinate is not finite ({v!r:.40})")
    if not lonlat:
        return
    lon, lat = pos[0], pos[1]
    if abs(lon) > 180.0 and abs(lat) > 90.0:
        raise SiteError(f"{where}: position [{lon}, {lat}] looks projected (metres, not degrees); "
                        f"{REPROJECT_ADVICE}")
    if not -180.0 <= lon <= 180.0:
        raise SiteError(f"{where}: longitude {lon} is outside [-180, 180] (positions are lon, lat)")
    if not -90.0 <= lat <= 90.0:
        swapped = " and looks swapped: GeoJSON positions are [lon, lat], not [lat, lon]" if abs(lon) <= 90 else ""
        raise SiteError(f"{where}: latitude {lat} is outside [-90, 90] (positions are lon, lat){swapped}")


def _finite(value) -> bool:
    """Finite as a float; integers too large for a float are not."""
    try:
        return math.isfinite(float(value))
    except OverflowError:
        return False


def lonlat_features(obj: Any, source: str) -> tuple[list, list[str]]:
    """The features of a parsed site collection with positions in WGS 84 lon/lat, and notes.

    Checks the collection itself (type, repeated keys, schema version, ``features``)
    and reads a legacy ``crs`` member (:func:`crs_member_transform`). GeoJSON's
    ``id``, ``bbox`` and a top-level ``name`` are accepted and not used.
    """
    if not isinstance(obj, dict) or obj.get("type") != "FeatureCollection":
        kind = obj.get("type") if isinstance(obj, dict) else type(obj).__name__
        raise SiteError(f"{source}: not a GeoJSON FeatureCollection (found {kind!r})")
    notes = []
    transform = None
    if "crs" in obj and obj["crs"] is not None:
        transform, note = crs_member_transform(obj["crs"], source, LONLAT_CRS_NAMES, REPROJECT_ADVICE)
        notes.append(note)
    _refuse_repeated(obj, source)
    _refuse_repeated(obj.get("properties"), f"{source}: top-level properties")
    features = obj.get("features")
    if not isinstance(features, list):
        raise SiteError(f"{source}: 'features' must be a list")
    _check_schema(obj, source)
    if transform is not None:
        features = [_reprojected_feature(i, f, transform, source) for i, f in enumerate(features)]
    return features, notes


def plain_feature(index: int, feature, source: str):
    """A feature as the merged site copy keeps it: type, non-null properties and geometry.

    Repeated keys are refused here, where the file's own parse still knows them; what
    is not a Feature is passed on unchanged for the site checks to name.
    """
    if not isinstance(feature, dict) or not isinstance(feature.get("properties"), dict):
        return feature
    props = feature["properties"]
    name = props.get("name")
    where = f"{source}: feature {index}" + (f" ({name[:100]!r})" if isinstance(name, str) else "")
    _refuse_repeated(feature, where)
    _refuse_repeated(props, f"{where} properties")
    _refuse_repeated(feature.get("geometry"), f"{where} geometry")
    return {"type": feature.get("type"), "properties": {k: v for k, v in props.items() if v is not None},
            "geometry": feature.get("geometry")}


def _reprojected_feature(index: int, feature, transform, source: str):
    if not isinstance(feature, dict) or not isinstance(feature.get("geometry"), dict):
        return feature
    props = feature.get("properties")
    name = props.get("name") if isinstance(props, dict) else None
    where = f"{source}: feature {index}" + (f" ({name[:100]!r})" if isinstance(name, str) else "")
    _refuse_repeated(feature, where)  # the copy below would forget them
    _refuse_repeated(feature["geometry"], f"{where} geometry")
    return {**feature, "geometry": reproject_positions(feature["geometry"], transform, where)}


def _location_warnings(frame: Frame, extent_m: tuple[float, float], named_crs: str | None,
                       distortion: float = 0.0) -> list[str]:
    """Warnings about where a site lies and how its frame distorts it.

    When a site's coordinates look swapped, projected or outside its named CRS's area
    of use, and when the working frame distorts distances by more than 1 in 1000.
    """
    from planner.notation import hemisphere

    out = []
    if distortion > MAX_SCALE_DISTORTION:
        out.append(f"the working frame distorts distances by up to {100 * distortion:.2g}% over the site (more "
                   f"than 1 in {1 / MAX_SCALE_DISTORTION:,.0f}); "
                   + ("name a --crs whose area of use covers the site, or leave --crs out"
                      if named_crs is not None else "the site is too large for one local frame"))
    lon, lat = frame.lon_0, frame.lat_0
    where = hemisphere(lat, lon)
    if max(extent_m) > MAX_SITE_M:
        out.append(f"the site is {extent_m[0] / 1000:,.0f} km x {extent_m[1] / 1000:,.0f} km around {where}: "
                   "far larger than a test yard; are the coordinates projected metres or in another order? "
                   "GeoJSON positions are [lon, lat] in degrees")
    if abs(lon) < 1.0 and abs(lat) < 1.0:
        out.append(f"the site lies at {where}, within a degree of 0 N 0 E: coordinates may be missing, "
                   "local or projected instead of lon/lat")
    if named_crs is not None:
        from pyproj import CRS

        area = CRS.from_user_input(named_crs).area_of_use
        if area is not None:
            def inside(x, y):
                return area.west - 1.0 <= x <= area.east + 1.0 and area.south - 1.0 <= y <= area.north + 1.0

            if not inside(lon, lat):
                swapped = (" Read as [lat, lon] it would lie inside: the coordinates look swapped."
                           if inside(lat, lon) else "")
                box = f"{hemisphere(area.south, area.west, 2)} to {hemisphere(area.north, area.east, 2)}"
                out.append(f"the site centre {where} lies outside the area of use of --crs "
                           f"({area.name.rstrip('.')}: {box}).{swapped}")
    return out


def _all_lonlat(geometry: dict) -> tuple[np.ndarray, np.ndarray]:
    flat: list = []

    def walk(node):
        if node and isinstance(node[0], (int, float)):
            flat.append(node[:2])
        else:
            for child in node:
                walk(child)

    walk(geometry["coordinates"])
    arr = np.asarray(flat, dtype=float)
    return arr[:, 0], arr[:, 1]


# ----------------------------------------------------------------------------- frames


def _make_frame(crs: str | None, lon: np.ndarray, lat: np.ndarray) -> Frame:
    lon_0 = float((lon.min() + lon.max()) / 2.0)
    lat_0 = float((lat.min() + lat.max()) / 2.0)
    if crs is None:
        text = (f"+proj=tmerc +lat_0={lat_0:.9f} +lon_0={lon_0:.9f} +k=1 +x_0=0 +y_0=0 "
                "+ellps=WGS84 +units=m +no_defs +type=crs")
        return Frame(crs=text, kind="local-tmerc", lon_0=lon_0, lat_0=lat_0)
    from pyproj import CRS
    from pyproj.exceptions import CRSError

    try:
        named = CRS.from_user_input(crs)
    except CRSError as err:
        raise SettingsError(f"load_site.crs {crs!r}: not a coordinate reference system pyproj knows") from err
    if not named.is_projected:
        raise SettingsError(f"load_site.crs {crs!r}: is not a projected CRS (a geographic CRS is in degrees; the "
                            "working frame must be in metres: name a projected CRS such as a UTM zone, or leave out "
                            "load_site.crs)")
    units = {ax.unit_name for ax in named.axis_info}
    if units - {"metre", "meter"}:
        raise SettingsError(f"load_site.crs {crs!r}: axis units are {', '.join(sorted(units))}, not metres")
    return Frame(crs=named.to_wkt(), kind="named", lon_0=lon_0, lat_0=lat_0)


def _project_geometry(item: dict, frame: Frame, fix: bool, source: str, site_warnings: list[str]):
    geometry = item["geometry"]
    where = f"{item['where']}"
    kind = geometry["type"]
    coords = geometry["coordinates"]
    if kind == "Point":
        x, y = frame.to_xy([coords[0]], [coords[1]])
        return Point(x[0], y[0])
    polygons = [coords] if kind == "Polygon" else coords
    parts = []
    for rings in polygons:
        projected = []
        for ring in rings:
            arr = np.asarray([p[:2] for p in ring], dtype=float)
            x, y = frame.to_xy(arr[:, 0], arr[:, 1])
            projected.append(np.column_stack([x, y]))
        parts.append(Polygon(projected[0], projected[1:]))
    geom = parts[0] if kind == "Polygon" else MultiPolygon(parts)
    if not geom.is_valid:
        reason = _reason_in_lonlat(shapely.is_valid_reason(geom), frame)
        if not fix:
            raise SiteError(f"{where}: invalid polygon ({reason}); fix the drawing or pass load_site.fix to repair "
                            "it")
        try:
            repaired = shapely.make_valid(geom)
        except shapely.errors.GEOSException as err:
            raise SiteError(f"{where}: invalid polygon ({reason}) that load_site.fix cannot repair ({err})") from err
        polys = [g for g in getattr(repaired, "geoms", [repaired]) if g.geom_type in _POLYGONAL]
        flat = []
        for g in polys:
            flat.extend(getattr(g, "geoms", [g]))
        if not flat:
            raise SiteError(f"{where}: invalid polygon ({reason}) and repairing it leaves no area")
        geom = flat[0] if len(flat) == 1 else MultiPolygon(flat)
        site_warnings.append(f"{item['label']}: repaired an invalid polygon ({reason}) with --fix")
    if geom.area <= MIN_AREA_M2:
        raise SiteError(f"{where}: polygon has zero area (under {MIN_AREA_M2:g} m2; collinear or repeated points?)")
    return geom


_REASON_AT = re.compile(r"\[(-?[\d.]+(?:e[-+]?\d+)?) (-?[\d.]+(?:e[-+]?\d+)?)\]")


def _reason_in_lonlat(reason: str, frame: Frame) -> str:
    """A GEOS validity reason with its location (working-frame metres) given as lat/lon."""
    from planner.notation import hemisphere

    def lonlat(match):
        try:
            lon, lat = frame.to_lonlat([float(match.group(1))], [float(match.group(2))])
        except (SiteError, ValueError):
            return match.group(0)
        return f" at {hemisphere(float(lat[0]), float(lon[0]), 7)}"

    return _REASON_AT.sub(lonlat, reason)
