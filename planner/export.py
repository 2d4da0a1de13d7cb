"""Waypoint files: GeoJSON (RFC 7946), CSV and GPX 1.1 routes, for simulators only.

This stage owns the waypoint file formats. Every file says, in a field that survives
its format, that it is for simulation only and not approved for field operation: the
GeoJSON ``use`` property, the CSV's ``use`` column and its sidecar text file, the GPX
descriptions. Every CSV starts with its header line, so data tools read it with their
defaults. Heights mean what each format says (see :mod:`planner.elevation`): the
altitude above ground has a named field of its own, GPX ``<ele>`` is an elevation above
sea level and a GeoJSON third coordinate a height above the WGS 84 ellipsoid, each
written only when the ground elevation is known. Files are written atomically (a temporary file in the same folder, then
``os.replace``) and deterministically: the same routes give byte-identical files, and
nothing time-dependent is written unless the caller passes it in.
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import math
import os
import stat
import tempfile
from collections.abc import Iterable
from datetime import UTC, datetime
from pathlib import Path
from xml.sax.saxutils import escape

from planner import checks
from planner.errors import RunFolderError, SettingsError
from planner.names import csv_cell
from planner.route import Route

#: The notice every waypoint file carries.
SIMULATION_NOTICE = (
    "simulation only - not approved for field operation; follow the site's safety rules, "
    "certified operators and local regulations"
)
#: GPX 1.1 namespace.
GPX_NAMESPACE = "http://www.topografix.com/GPX/1/1"
#: Decimals of lon/lat in every file: 1e-9 degree is about 0.1 mm on the ground.
LONLAT_DECIMALS = 9
#: Decimals of metres (positions, lengths, clearances, altitude) in every file.
METRE_DECIMALS = 3
#: Columns of the waypoint CSV, in order; the height columns (:data:`HEIGHT_COLUMNS`)
#: follow ``lat`` when they have values, and ``use`` (the notice) is always last.
CSV_COLUMNS = ("policy", "seq", "east_m", "north_m", "lon", "lat", "leg_m", "cumulative_m",
               "clearance_m", "nearest_hazard", "use")
#: Height columns and properties: altitude above ground, ground elevation and its datum,
#: elevation above sea level (GPX ``ele``), height above the WGS 84 ellipsoid.
HEIGHT_COLUMNS = ("alt_above_ground_m", "ground_elevation_m", "vertical_datum", "elevation_m",
                  "ellipsoidal_height_m")
#: Namespace of our GPX extension elements (GPX 1.1 allows any in ``<extensions>``).
GPX_EXTENSION_NAMESPACE = "urn:veerwise:gpx-extensions:1"


def _check_alt(alt_m) -> float | None:
    if alt_m is None:
        return None
    return float(check_alt(alt_m, "export.alt_m"))


#: Highest altitude above ground the waypoint files accept (metres).
MAX_ALT_M = 10_000.0


def check_alt(alt_m, name: str):
    """An altitude above ground for the waypoint files: a finite number of metres >= 0 (or unset)."""
    return checks.number(alt_m, name, low=0.0, high=MAX_ALT_M, unset=True,
                         says=f"a number of metres above ground in [0, {MAX_ALT_M:g}]")


def notice(alt_m: float | None = None) -> str:
    """The simulation-only notice, with the altitude convention when one is set."""
    alt_m = _check_alt(alt_m)
    if alt_m is None:
        return SIMULATION_NOTICE
    return (f"{SIMULATION_NOTICE}; altitude is a constant {alt_m:.{METRE_DECIMALS}f} m above ground level "
            "(not above sea level)")


def _routes(route_or_routes) -> list[Route]:
    routes = [route_or_routes] if isinstance(route_or_routes, Route) else list(route_or_routes)
    if not routes:
        raise SettingsError("no route to export")
    for r in routes:
        if not isinstance(r, Route):
            raise SettingsError(f"expected planner.route.Route objects to export, got {type(r).__name__}")
    names = [r.name for r in routes]
    if len(set(names)) != len(names):
        raise SettingsError(f"routes to export share a policy name ({', '.join(names)}); names must differ")
    return routes


def _metres(value: float) -> float:
    return round(float(value), METRE_DECIMALS)


def _degrees(value: float) -> float:
    return round(float(value), LONLAT_DECIMALS)


def _clearance(value: float) -> float | None:
    return _metres(value) if math.isfinite(value) else None


def _lon_normalised(lon: float) -> float:
    # GPX and most readers want longitude in [-180, 180); 180 and -180 are one meridian.
    return lon - 360.0 if lon >= 180.0 else lon


# ----------------------------------------------------------------------------- GeoJSON


def _height_records(route: Route, alt_m: float | None, ground) -> dict:
    """Per waypoint heights of one route (see :func:`planner.elevation.heights`), rounded to mm."""
    from planner.elevation import heights

    found = heights(ground, [w.lon for w in route.waypoints], [w.lat for w in route.waypoints], alt_m)
    for key in ("ground_m", "sea_level_m", "ellipsoidal_m"):
        if found[key] is not None:
            found[key] = [_metres(v) for v in found[key]]
    found["datum"] = ground.datum_name if ground is not None else None
    return found


def heights_said(alt_m: float | None, ground, found: dict, what: str) -> str:
    """One sentence on what a file's heights are, or why it has none."""
    above = (f"altitude {alt_m:.{METRE_DECIMALS}f} m above ground in alt_above_ground_m" if alt_m is not None
             else "no altitude above ground given (--alt-m)")
    key, reason = {"ele": ("sea_level_m", "no_sea_level"), "z": ("ellipsoidal_m", "no_ellipsoidal")}[what]
    if found[key] is None:
        target = "no <ele>" if what == "ele" else "no third coordinate"
        return f"{above}; {target}: {found[reason]}"
    kind = ("<ele> is the elevation above sea level" if what == "ele"
            else "the third coordinate is the height above the WGS 84 ellipsoid (RFC 7946 section 4)")
    return f"{above}; {kind}, from the ground elevation ({ground.described}) plus the altitude above ground"


def to_geojson(route_or_routes, *, site, alt_m: float | None = None, ground=None) -> dict:
    """The routes as an RFC 7946 FeatureCollection (a plain dict, JSON-ready).

    Per route: one LineString feature through its waypoints (``geometry`` is ``null``
    when the route has a single waypoint, since a LineString needs two positions) and
    one Point feature per waypoint. Positions are ``[lon, lat]`` rounded to 9
    decimals; a third coordinate, the height above the WGS 84 ellipsoid (RFC 7946
    section 4), only when the ground elevation is known (``ground``, a
    :class:`planner.elevation.Ground`) in that datum or convertible to it. Every
    feature's properties carry ``use``, the simulation-only notice, and the heights
    by name (``alt_above_ground_m``, ``ground_elevation_m``, ``vertical_datum``,
    ``elevation_m``, ``ellipsoidal_height_m``); so does the collection (foreign
    members ``use`` and ``heights``, the latter saying what the positions hold).

    Parameters
    ----------
    route_or_routes : a :class:`~planner.route.Route` or several (distinct names).
    site : the :class:`~planner.site.Site` the routes were planned on (its name and
        input hash are recorded).
    alt_m : constant altitude above ground level, metres.
    ground : the ground elevation and its vertical datum, or None (no heights).
    """
    routes = _routes(route_or_routes)
    alt_m = _check_alt(alt_m)
    use = notice(alt_m)

    features = []
    said = None
    for r in routes:
        found = _height_records(r, alt_m, ground)
        said = said or heights_said(alt_m, ground, found, "z")
        z = found["ellipsoidal_m"]
        coords = [[_degrees(_lon_normalised(w.lon)), _degrees(w.lat), *([z[k]] if z is not None else [])]
                  for k, w in enumerate(r.waypoints)]
        features.append({
            "type": "Feature",
            "geometry": {"type": "LineString", "coordinates": coords} if len(coords) >= 2 else None,
            "properties": {
                "kind": "route", "policy": r.name, "reached_goal": r.reached_goal, "end_event": r.end_event,
                "n_moves": r.n_moves, "cell_path_m": _metres(r.length_m), "length_m": _metres(r.waypoint_length_m),
                "n_waypoints": len(r.waypoints), "min_clearance_m": _clearance(r.min_clearance_m),
                "min_clearance_hazard": r.min_clearance_hazard, "alt_above_ground_m": alt_m,
                "vertical_datum": found["datum"], "use": use,
            },
        })
        for k, (w, pos) in enumerate(zip(r.waypoints, coords, strict=True)):
            features.append({
                "type": "Feature",
                "geometry": {"type": "Point", "coordinates": pos},
                "properties": {
                    "kind": "waypoint", "policy": r.name, "seq": w.seq, "east_m": _metres(w.east_m),
                    "north_m": _metres(w.north_m), "leg_m": _metres(w.leg_m), "cumulative_m": _metres(w.cumulative_m),
                    "clearance_m": _clearance(w.clearance_m), "nearest_hazard": w.nearest_hazard,
                    "alt_above_ground_m": alt_m, **_height_fields(found, k), "use": use,
                },
            })
    return {
        "type": "FeatureCollection",
        "use": use,
        "heights": said,
        "site": {"name": site.name, "sha256": site.sha256},
        "features": features,
    }


def _height_fields(found: dict, k: int) -> dict:
    def at(key):
        return found[key][k] if found[key] is not None else None

    return {"ground_elevation_m": at("ground_m"), "vertical_datum": found["datum"], "elevation_m": at("sea_level_m"),
            "ellipsoidal_height_m": at("ellipsoidal_m")}


def geojson_text(route_or_routes, *, site, alt_m: float | None = None, ground=None) -> str:
    """:func:`to_geojson` as the exact text :func:`write_geojson` writes."""
    obj = to_geojson(route_or_routes, site=site, alt_m=alt_m, ground=ground)

    def dump(value) -> str:
        # allow_nan=False: a NaN or inf that slipped through would make the file invalid JSON.
        return json.dumps(value, ensure_ascii=False, allow_nan=False)

    # One feature per line: compact, yet a reviewer can read and diff it.
    head = dump({k: v for k, v in obj.items() if k != "features"})
    body = ",\n".join(dump(f) for f in obj["features"])
    return f'{head[:-1]}, "features": [\n{body}\n]}}\n'


def write_geojson(route_or_routes, path, *, site, alt_m: float | None = None, ground=None) -> Path:
    """Write :func:`to_geojson` to ``path`` atomically; returns the path."""
    return _write_atomic(path, geojson_text(route_or_routes, site=site, alt_m=alt_m, ground=ground))


def read_waypoints_geojson(path, *, policy: str | None = None) -> list[tuple[float, float]]:
    """The (lon, lat) of the waypoint Points of a file written by :func:`write_geojson`.

    Points come in file order (route by route, by ``seq``); ``policy`` keeps one route's.

    Raises
    ------
    RunFolderError
        When the file cannot be read or is not a waypoint FeatureCollection.
    """
    path = Path(path)
    try:
        obj = json.loads(path.read_text(encoding="utf-8"))
    except OSError as err:
        raise RunFolderError(f"{path}: cannot read the waypoint file ({err.strerror or err})") from err
    except ValueError as err:
        raise RunFolderError(f"{path}: not valid JSON ({err})") from err
    if not isinstance(obj, dict) or obj.get("type") != "FeatureCollection" or not isinstance(
            obj.get("features"), list):
        raise RunFolderError(f"{path}: not a GeoJSON FeatureCollection of waypoints")
    out = []
    for i, feat in enumerate(obj["features"]):
        props = feat.get("properties") if isinstance(feat, dict) else None
        if not isinstance(props, dict) or props.get("kind") != "waypoint":
            continue
        if policy is not None and props.get("policy") != policy:
            continue
        geom = feat.get("geometry")
        coords = geom.get("coordinates") if isinstance(geom, dict) and geom.get("type") == "Point" else None
        if not (isinstance(coords, list) and 2 <= len(coords) <= 3
                and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in coords)):
            raise RunFolderError(f"{path}: feature {i} is a waypoint without a [lon, lat] Point")
        out.append((float(coords[0]), float(coords[1])))
    if not out:
        which = f" of policy {policy!r}" if policy is not None else ""
        raise RunFolderError(f"{path}: has no waypoints{which}")
    return out


# ----------------------------------------------------------------------------- CSV


def csv_text(route: Route, *, alt_m: float | None = None, ground=None) -> str:
    """The waypoint CSV as text: a header line, then one row per waypoint.

    Fixed decimals: east/north, lengths and heights 3, lon/lat 9. ``clearance_m``
    and ``nearest_hazard`` are empty when the site has no hazards. The height columns
    (:data:`HEIGHT_COLUMNS`) are there only when they have values; ``use``, the
    simulation-only notice, is on every row. No comment lines: what used to be said
    in them is in the sidecar text file (:func:`csv_sidecar_text`).
    """
    (route,) = _routes([route])
    alt_m = _check_alt(alt_m)
    found = _height_records(route, alt_m, ground)
    present = {"alt_above_ground_m": alt_m is not None, "ground_elevation_m": found["ground_m"] is not None,
               "vertical_datum": found["ground_m"] is not None, "elevation_m": found["sea_level_m"] is not None,
               "ellipsoidal_height_m": found["ellipsoidal_m"] is not None}
    columns = list(CSV_COLUMNS)
    at = columns.index("lat") + 1
    columns[at:at] = [c for c in HEIGHT_COLUMNS if present[c]]
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(columns)
    m, d = METRE_DECIMALS, LONLAT_DECIMALS
    use = notice(alt_m)
    for k, w in enumerate(route.waypoints):
        heights = _height_fields(found, k)
        row = {
            "policy": route.name, "seq": str(w.seq), "east_m": f"{w.east_m:.{m}f}", "north_m": f"{w.north_m:.{m}f}",
            "lon": f"{_lon_normalised(w.lon):.{d}f}", "lat": f"{w.lat:.{d}f}", "leg_m": f"{w.leg_m:.{m}f}",
            "cumulative_m": f"{w.cumulative_m:.{m}f}",
            "clearance_m": f"{w.clearance_m:.{m}f}" if math.isfinite(w.clearance_m) else "",
            "nearest_hazard": csv_cell(w.nearest_hazard or ""), "use": use,
            "alt_above_ground_m": f"{alt_m:.{m}f}" if alt_m is not None else "",
            "vertical_datum": csv_cell(heights["vertical_datum"] or ""),
        }
        for key in ("ground_elevation_m", "elevation_m", "ellipsoidal_height_m"):
            row[key] = f"{heights[key]:.{m}f}" if heights[key] is not None else ""
        writer.writerow([row[c] for c in columns])
    return buf.getvalue()


def sidecar_path(csv_path) -> Path:
    """The text file beside a waypoint CSV: the same name with ``.txt`` for ``.csv``."""
    return Path(csv_path).with_suffix(".txt")


def csv_sidecar_text(route: Route, *, alt_m: float | None = None, ground=None) -> str:
    """What a waypoint CSV's sidecar says: the notice, the route in one line, the columns, the heights."""
    (route,) = _routes([route])
    alt_m = _check_alt(alt_m)
    found = _height_records(route, alt_m, ground)
    clearance = "none" if not math.isfinite(route.min_clearance_m) else (
        f"{route.min_clearance_m:.{METRE_DECIMALS}f} m ({route.min_clearance_hazard})")
    lines = [
        f"{notice(alt_m)}.",
        "",
        f"Policy {route.name}: reached goal {'yes' if route.reached_goal else 'no'} (ended: {route.end_event}), "
        f"{len(route.waypoints)} waypoints, {route.waypoint_length_m:.{METRE_DECIMALS}f} m, least clearance to a "
        f"hazard {clearance}.",
        "",
        "Columns: policy; seq (waypoint number from 0); east_m, north_m (metres in the working frame); lon, lat "
        "(WGS 84 degrees); leg_m, cumulative_m (metres along the waypoints); clearance_m, nearest_hazard (to the "
        "nearest hazard's drawn outline); use (this notice, on every row).",
        f"Heights: {heights_said(alt_m, ground, found, 'ele')}.",
    ]
    if found["ground_m"] is not None:
        lines.append("Height columns: alt_above_ground_m, ground_elevation_m and vertical_datum (the ground's "
                     "datum), elevation_m (above sea level) and ellipsoidal_height_m (above the WGS 84 ellipsoid) "
                     "where they could be worked out.")
    return "\n".join(lines) + "\n"


def write_csv(route: Route, path, *, alt_m: float | None = None, ground=None) -> Path:
    """Write :func:`csv_text` of one route to ``path`` and its sidecar beside it, atomically; returns the path.

    The sidecar (:func:`sidecar_path`) is written first, so a CSV is never without it.
    """
    _write_atomic(sidecar_path(path), csv_sidecar_text(route, alt_m=alt_m, ground=ground))
    return _write_atomic(path, csv_text(route, alt_m=alt_m, ground=ground))


# ----------------------------------------------------------------------------- GPX


def _gpx_time(time) -> str:
    if isinstance(time, str):
        try:
            time = datetime.fromisoformat(time.replace("Z", "+00:00"))
        except ValueError as err:
            raise SettingsError(f"GPX time {time!r} is not an ISO 8601 date and time") from err
    if not isinstance(time, datetime) or time.tzinfo is None:
        raise SettingsError(f"GPX time must be a timezone-aware datetime or ISO 8601 text, got {time!r}")
    return time.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def gpx_text(routes, *, alt_m: float | None = None, time=None, name: str | None = None, ground=None) -> str:
    """The routes as a GPX 1.1 document: ``<metadata>`` then one ``<rte>`` per policy.

    Element order follows the GPX 1.1 schema: in ``metadata`` name, desc, time, bounds;
    in ``rte`` name, desc, rtept; in ``rtept`` ele, name, cmt, extensions. ``<ele>``
    (the elevation above sea level) is written only when the ground elevation is known
    (``ground``); otherwise the metadata says why it is left out. The altitude above
    ground goes in ``<cmt>`` and in our extension element ``alt_above_ground_m``. The
    notice is in ``<metadata><desc>`` and in every ``<rte><desc>``. ``time`` (aware
    datetime or ISO 8601 text) is written only when given.
    """
    routes = _routes(routes)
    alt_m = _check_alt(alt_m)
    text = notice(alt_m)
    d, m = LONLAT_DECIMALS, METRE_DECIMALS
    found = {r.name: _height_records(r, alt_m, ground) for r in routes}
    said = heights_said(alt_m, ground, found[routes[0].name], "ele")
    lats = [w.lat for r in routes for w in r.waypoints]
    lons = [_lon_normalised(w.lon) for r in routes for w in r.waypoints]
    lines = [
        '<?xml version="1.0" encoding="UTF-8"?>',
        f'<gpx xmlns="{GPX_NAMESPACE}" xmlns:vw="{GPX_EXTENSION_NAMESPACE}" version="1.1" creator="veerwise">',
        " <metadata>",
    ]
    if name is not None:
        lines.append(f"  <name>{escape(name)}</name>")
    lines.append(f"  <desc>{escape(f'{text}. Heights: {said}')}</desc>")
    if time is not None:
        lines.append(f"  <time>{_gpx_time(time)}</time>")
    lines.append(f'  <bounds minlat="{min(lats):.{d}f}" minlon="{min(lons):.{d}f}" '
                 f'maxlat="{max(lats):.{d}f}" maxlon="{max(lons):.{d}f}"/>')
    lines.append(" </metadata>")
    for r in routes:
        lines += [" <rte>", f"  <name>{escape(r.name)}</name>",
                  f"  <desc>{escape(f'{r.name} route: {text}')}</desc>"]
        heights = found[r.name]
        for k, w in enumerate(r.waypoints):
            lines.append(f'  <rtept lat="{w.lat:.{d}f}" lon="{_lon_normalised(w.lon):.{d}f}">')
            if heights["sea_level_m"] is not None:
                lines.append(f"   <ele>{heights['sea_level_m'][k]:.{m}f}</ele>")
            lines.append(f"   <name>{escape(f'{r.name}-{w.seq:03d}')}</name>")
            if alt_m is not None:
                lines.append(f"   <cmt>{alt_m:.{m}f} m above ground level</cmt>")
                lines.append("   <extensions>")
                lines.append(f"    <vw:alt_above_ground_m>{alt_m:.{m}f}</vw:alt_above_ground_m>")
                if heights["ground_m"] is not None:
                    lines.append(f"    <vw:ground_elevation_m>{heights['ground_m'][k]:.{m}f}</vw:ground_elevation_m>")
                lines.append("   </extensions>")
            lines.append("  </rtept>")
        lines.append(" </rte>")
    lines.append("</gpx>")
    return "\n".join(lines) + "\n"


def write_gpx(routes, path, *, alt_m: float | None = None, time=None, name: str | None = None,
              ground=None) -> Path:
    """Write :func:`gpx_text` to ``path`` atomically; returns the path."""
    return _write_atomic(path, gpx_text(routes, alt_m=alt_m, time=time, name=name, ground=ground))


# ----------------------------------------------------------------------------- files


def process_umask() -> int:
    """The process umask (read by setting it and putting it back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


#: The file that makes a folder a run folder, and the format it names.
RUN_MANIFEST = "manifest.json"
RUN_FORMAT = "veerwise-run"


def is_run_folder(folder) -> bool:
    """True when ``folder`` holds a veerwise manifest (a plain file naming our format).

    The manifest is not parsed, only searched for its format member, so a damaged
    manifest still marks the folder as a run folder (and protects it).
    """
    try:
        fd = os.open(Path(folder) / RUN_MANIFEST, os.O_RDONLY | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0))
    except OSError:
        return False
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            return False
        head = os.read(fd, 16 * 2**20)
    finally:
        os.close(fd)
    return f'"format": "{RUN_FORMAT}"'.encode() in head


def refuse_run_folder_target(path, what: str = "output") -> Path:
    """``path`` resolved (symlinks followed); refused when it lands in a run folder.

    A run folder's files are written only by the run-folder transaction; any other
    write there (an export over the manifest, a figure over a waypoint file) would
    destroy the run, so it is refused before any work.
    """
    path = Path(path)
    resolved = path.resolve()
    if resolved.is_dir():
        raise RunFolderError(f"{what} {path}: is a folder, expected a file name")
    if is_run_folder(resolved.parent):
        raise RunFolderError(f"{what} {path}: lies inside the run folder {resolved.parent}, whose files only "
                             "veerwise plan and brief write; choose a file outside it")
    return resolved


def fsync_path(path) -> None:
    """Flush a file or a folder's entries to disk (a folder fsync makes renames in it durable)."""
    flags = os.O_RDONLY | (getattr(os, "O_DIRECTORY", 0) if Path(path).is_dir() else 0)
    fd = os.open(path, flags)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


#: File formats by file-name extension, as ``-o`` decides them.
FORMAT_OF_EXTENSION = {".geojson": "geojson", ".json": "geojson", ".csv": "csv", ".gpx": "gpx", ".png": "png",
                       ".tif": "geotiff", ".tiff": "geotiff", ".gpkg": "geopackage"}


def output_format(path, allowed, *, fmt: str | None = None, option: str = "export.output") -> str:
    """The format of an output file, read from its extension; a ``fmt`` given too must match it.

    Raises
    ------
    SettingsError
        When the extension names no allowed format, or names another than ``fmt``.
    """
    suffix = Path(path).suffix.lower()
    found = FORMAT_OF_EXTENSION.get(suffix)
    names = ", ".join(sorted(e for e, f in FORMAT_OF_EXTENSION.items() if f in allowed))
    if found not in allowed:
        raise SettingsError(f"{option} {path}: the extension {suffix or '(none)'} names no format this command "
                            f"writes; use one of {names}")
    if fmt is not None and fmt != found:
        raise SettingsError(f"{option} {path}: export.fmt {fmt} does not match the extension {suffix} ({found}); "
                            "drop export.fmt or change the file name")
    return found


def check_output(path, allowed, *, fmt: str | None = None, force: bool = False,
                 option: str = "export.output") -> str:
    """Refuse an output file before any work, and return its format.

    Refused: a wrong extension, a folder, a missing parent folder, or a file already
    there without ``force``.
    """
    found = output_format(path, allowed, fmt=fmt, option=option)
    target = Path(path)
    if target.is_dir():
        raise RunFolderError(f"{option} {target}: is a folder, not a file")
    if target.exists() and not force:
        raise RunFolderError(f"{option} {target}: already exists; choose another name or pass export.force to replace it")
    folder = target.parent if str(target.parent) else Path(".")
    if not folder.is_dir():
        raise RunFolderError(f"{option} {target}: folder {folder} does not exist")
    return found


@contextlib.contextmanager
def atomic_output(path, *, guard: bool = True):
    """Yield a temporary path beside ``path``; rename it into place only on success.

    A reader never sees a half-written file: it finds the old file or the new one.
    The file gets the usual permissions (0666 less the umask) and is flushed to disk
    before the rename. A symlink at ``path`` is followed (its target is replaced).
    With ``guard`` (the default) a target inside a run folder is refused (see
    :func:`refuse_run_folder_target`); the run-folder transaction passes ``False``.
    """
    path = refuse_run_folder_target(path) if guard else Path(path).resolve()
    folder = path.parent
    if not folder.is_dir():
        raise RunFolderError(f"{path}: folder {folder} does not exist")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=path.suffix or ".tmp", dir=folder)
    except OSError as err:
        raise RunFolderError(f"{path}: cannot write in {folder} ({err.strerror or err})") from err
    os.close(fd)
    try:
        os.chmod(tmp, 0o666 & ~process_umask())
        yield Path(tmp)
        fsync_path(tmp)
        os.replace(tmp, path)
    except OSError as err:
        raise RunFolderError(f"{path}: cannot write ({err.strerror or err}); the file was not changed") from err
    finally:
        if os.path.lexists(tmp):
            os.unlink(tmp)


def _write_atomic(path, text: str) -> Path:
    """Write UTF-8 ``text`` to ``path`` atomically (see :func:`atomic_output`)."""
    with atomic_output(path) as tmp:
        tmp.write_bytes(text.encode("utf-8"))
    return Path(path)


def export_routes(routes: Iterable[Route], folder, *, site, formats=("geojson", "csv"), alt_m=None) -> list[Path]:
    """Write each route in each of ``formats`` into ``folder``; returns the paths written.

    One file per route and format, in the order of ``routes`` then of ``formats``, named
    as the run folder names them: ``routes-{policy}.geojson``, ``waypoints-{policy}.csv``,
    ``routes-{policy}.gpx``.
    """
    routes = _routes(list(routes))
    unknown = sorted(set(formats) - {"geojson", "csv", "gpx"})
    if unknown:
        raise SettingsError(f"export.formats {unknown[0]!r} is not one of geojson, csv, gpx")
    folder = Path(folder)
    written = []
    for r in routes:
        for fmt in formats:
            target = folder / f"{'waypoints' if fmt == 'csv' else 'routes'}-{r.name}.{fmt}"
            if fmt == "geojson":
                written.append(write_geojson(r, target, site=site, alt_m=alt_m))
            elif fmt == "csv":
                written.append(write_csv(r, target, alt_m=alt_m))
            else:
                written.append(write_gpx([r], target, alt_m=alt_m, name=site.name))
    return written
