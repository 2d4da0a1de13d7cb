"""Waypoint files: GeoJSON (RFC 7946), CSV and GPX 1.1, simulation-only notice, round trips."""

from __future__ import annotations

import csv
import io
import json
import re
import xml.etree.ElementTree as ET
from datetime import UTC, datetime

import numpy as np
import pytest
from conftest import hazard_free_route, small_site_dict
from numpy.testing import assert_allclose

from planner.errors import RunFolderError, SettingsError
from planner.export import (
    CSV_COLUMNS,
    GPX_EXTENSION_NAMESPACE,
    GPX_NAMESPACE,
    SIMULATION_NOTICE,
    export_routes,
    read_waypoints_geojson,
    to_geojson,
    write_csv,
    write_geojson,
    write_gpx,
)
from planner.grid import GridSpec, descend, rasterise
from planner.model import EVENT_HAZARD, Dynamics, build_model
from planner.route import NominalPath, build_route, nominal_path
from planner.site import site_from_geojson

NS = {"g": GPX_NAMESPACE}

# Child order of the GPX 1.1 complex types we write, from the GPX 1.1 schema
# (TopoGrafix, "GPX 1.1 Schema Documentation", gpx.xsd: gpxType, metadataType, rteType,
# wptType; from memory). Each element may only be followed by elements later in its list.
GPX_ORDER = {
    "gpx": ["metadata", "wpt", "rte", "trk", "extensions"],
    "metadata": ["name", "desc", "author", "copyright", "link", "time", "keywords", "bounds", "extensions"],
    "rte": ["name", "cmt", "desc", "src", "link", "number", "type", "extensions", "rtept"],
    "rtept": ["ele", "time", "magvar", "geoidheight", "name", "cmt", "desc", "src", "link", "sym", "type",
              "fix", "sat", "hdop", "vdop", "pdop", "ageofdgpsdata", "dgpsid", "extensions"],
}




@pytest.fixture(scope="module")
def planned():
    """The small test site (drift off) and two routes: shortest metres and fewest moves."""
    site = site_from_geojson(small_site_dict())
    grid = rasterise(site, GridSpec(2.0))
    model = build_model(grid, Dynamics(drift_scale=0.0))
    shortest = build_route("shortest", nominal_path(model, descend(grid)), grid, site, model)
    fewest = build_route("fewest-moves", nominal_path(model, descend(grid, unit_cost=True)), grid, site,
                         model)
    return site, grid, model, [shortest, fewest]


def _walk(obj):
    """Every dict inside a parsed JSON value."""
    if isinstance(obj, dict):
        yield obj
        for v in obj.values():
            yield from _walk(v)
    elif isinstance(obj, list):
        for v in obj:
            yield from _walk(v)


def _refuse(name):
    raise ValueError(f"JSON constant {name}")


def _read_csv(path):
    """(the sidecar's lines, the rows): a waypoint CSV has no comment lines, its header comes first."""
    text = path.read_text(encoding="utf-8")
    assert not any(line.startswith("#") for line in text.splitlines())
    sidecar = path.with_suffix(".txt").read_text(encoding="utf-8").splitlines()
    return sidecar, list(csv.DictReader(io.StringIO(text)))


# ----------------------------------------------------------------------------- GeoJSON


def test_geojson_is_rfc7946_shaped(planned, tmp_path):
    # IETF RFC 7946, "The GeoJSON Format" (2016): sections 3.1.1 (positions are
    # [lon, lat(, alt)]), 3.1.4 (a LineString has two or more positions), 3.2 (a
    # Feature has "geometry" and "properties"), 3.3 (FeatureCollection "features"),
    # 4 (no "crs" member; WGS 84 only).
    site, _grid, _model, routes = planned
    path = write_geojson(routes, tmp_path / "routes.geojson", site=site)
    obj = json.loads(path.read_text(encoding="utf-8"), parse_constant=_refuse)
    assert obj == to_geojson(routes, site=site)
    assert obj["type"] == "FeatureCollection"
    assert not any("crs" in d for d in _walk(obj))
    assert len(obj["features"]) == sum(1 + len(r.waypoints) for r in routes)
    lines = [f for f in obj["features"] if f["geometry"]["type"] == "LineString"]
    assert [f["properties"]["policy"] for f in lines] == ["shortest", "fewest-moves"]
    for feature in obj["features"]:
        assert feature["type"] == "Feature" and {"geometry", "properties"} <= set(feature)
        geom = feature["geometry"]
        positions = geom["coordinates"] if geom["type"] == "LineString" else [geom["coordinates"]]
        for lon, lat in positions:
            assert -180.0 <= lon <= 180.0 and -90.0 <= lat <= 90.0
    for route, line in zip(routes, lines, strict=True):
        coords = np.array(line["geometry"]["coordinates"])
        assert coords.shape == (len(route.waypoints), 2) and len(coords) >= 2
        # Rounded to 9 decimals: within half a unit of the 9th decimal of the exact value.
        exact = np.array([(w.lon, w.lat) for w in route.waypoints])
        assert_allclose(coords, exact, rtol=0, atol=5.1e-10)
        points = [f for f in obj["features"]
                  if f["geometry"]["type"] == "Point" and f["properties"]["policy"] == route.name]
        assert [p["properties"]["seq"] for p in points] == list(range(len(route.waypoints)))
        assert [p["geometry"]["coordinates"] for p in points] == line["geometry"]["coordinates"]
        for p, w in zip(points, route.waypoints, strict=True):
            props = p["properties"]
            assert {"seq", "leg_m", "cumulative_m", "clearance_m", "nearest_hazard", "policy"} <= set(props)
            assert_allclose([props["leg_m"], props["cumulative_m"], props["clearance_m"]],
                            [w.leg_m, w.cumulative_m, w.clearance_m], rtol=0, atol=5e-4)
            assert props["nearest_hazard"] == "Pond"


def test_geojson_round_trip_within_a_millimetre(planned, tmp_path):
    site, _grid, _model, routes = planned
    path = write_geojson(routes, tmp_path / "routes.geojson", site=site)
    for route in routes:
        back = np.array(read_waypoints_geojson(path, policy=route.name))
        x, y = site.frame.to_xy(back[:, 0], back[:, 1])
        assert_allclose(np.column_stack([x, y]), route.waypoint_xy(), rtol=0, atol=1e-3)
    assert len(read_waypoints_geojson(path)) == sum(len(r.waypoints) for r in routes)


def test_geojson_altitude_above_ground_is_a_property_not_a_third_coordinate(planned, tmp_path):
    # RFC 7946 section 4: a third coordinate is the height above the WGS 84 ellipsoid,
    # which an altitude above ground is not
    site, _grid, _model, routes = planned
    obj = json.loads(write_geojson(routes[0], tmp_path / "a.geojson", site=site, alt_m=12.5).read_text())
    for feature in obj["features"]:
        geom = feature["geometry"]
        positions = geom["coordinates"] if geom["type"] == "LineString" else [geom["coordinates"]]
        assert all(len(p) == 2 for p in positions)
        assert "12.500 m above ground level" in feature["properties"]["use"]
        assert feature["properties"]["alt_above_ground_m"] == 12.5
    assert "no third coordinate: no height above the WGS 84 ellipsoid: no ground elevation was given" in obj["heights"]
    # Reading back ignores the altitude.
    assert len(read_waypoints_geojson(tmp_path / "a.geojson")[0]) == 2


def test_geojson_without_hazards_writes_null_clearance(tmp_path):
    site, grid, model, route = hazard_free_route()
    text = write_geojson(route, tmp_path / "r.geojson", site=site).read_text()
    obj = json.loads(text, parse_constant=_refuse)  # no Infinity or NaN in the file
    for feature in obj["features"]:
        props = feature["properties"]
        assert props.get("clearance_m", props.get("min_clearance_m")) is None
    _, rows = _read_csv(write_csv(route, tmp_path / "r.csv"))
    assert all(r["clearance_m"] == "" and r["nearest_hazard"] == "" for r in rows)


def test_single_waypoint_route_has_no_linestring(planned):
    site, grid, model, _routes = planned
    start = grid.start_index
    pond_cell = int(np.flatnonzero(grid.label.ravel() == 0)[0])
    route = build_route("stuck", NominalPath(np.array([start]), EVENT_HAZARD, pond_cell), grid, site, model)
    obj = to_geojson(route, site=site)
    line = obj["features"][0]
    # RFC 7946 section 3.2: a Feature's geometry may be null; section 3.1.4 forbids a
    # one-position LineString.
    assert line["geometry"] is None and line["properties"]["end_event"] == "Pond"
    assert obj["features"][1]["geometry"]["type"] == "Point"


# ----------------------------------------------------------------------------- CSV


def test_csv_starts_with_its_header_and_says_the_notice_in_a_column_and_a_sidecar(planned, tmp_path):
    _site, _grid, _model, routes = planned
    route = routes[0]
    path = write_csv(route, tmp_path / "shortest.csv")
    text = path.read_text(encoding="utf-8")
    assert text.splitlines()[0] == ",".join(CSV_COLUMNS)
    sidecar, rows = _read_csv(path)
    assert SIMULATION_NOTICE in sidecar[0].lower()
    assert any(line.startswith("Policy shortest: reached goal yes") for line in sidecar)
    assert list(rows[0]) == list(CSV_COLUMNS)
    assert all(r["use"] == SIMULATION_NOTICE for r in rows)
    assert len(rows) == len(route.waypoints)
    for row, w in zip(rows, route.waypoints, strict=True):
        assert row["policy"] == "shortest" and int(row["seq"]) == w.seq
        assert re.fullmatch(r"-?\d+\.\d{3}", row["east_m"]) and re.fullmatch(r"-?\d+\.\d{3}", row["north_m"])
        assert re.fullmatch(r"-?\d+\.\d{9}", row["lon"]) and re.fullmatch(r"-?\d+\.\d{9}", row["lat"])
        assert_allclose([float(row["east_m"]), float(row["north_m"]), float(row["leg_m"]),
                         float(row["cumulative_m"]), float(row["clearance_m"])],
                        [w.east_m, w.north_m, w.leg_m, w.cumulative_m, w.clearance_m], rtol=0, atol=5e-4)
        assert_allclose([float(row["lon"]), float(row["lat"])], [w.lon, w.lat], rtol=0, atol=5.1e-10)
        assert row["nearest_hazard"] == "Pond"


def test_csv_round_trip_and_altitude(planned, tmp_path):
    site, _grid, _model, routes = planned
    route = routes[1]
    sidecar, rows = _read_csv(write_csv(route, tmp_path / "r.csv", alt_m=30))
    assert "alt_m" not in rows[0] and all(r["alt_above_ground_m"] == "30.000" for r in rows)
    assert "elevation_m" not in rows[0]
    assert all("30.000 m above ground level" in r["use"] for r in rows)
    assert any("no <ele>" in line and "no ground elevation was given" in line for line in sidecar)
    x, y = site.frame.to_xy([float(r["lon"]) for r in rows], [float(r["lat"]) for r in rows])
    assert_allclose(np.column_stack([x, y]), route.waypoint_xy(), rtol=0, atol=1e-3)


# ----------------------------------------------------------------------------- GPX


def _local(tag):
    return tag.split("}", 1)[1]


def _assert_schema_order(element):
    order = GPX_ORDER[_local(element.tag)]
    ranks = [order.index(_local(child.tag)) for child in element]
    assert ranks == sorted(ranks), f"{_local(element.tag)} children out of schema order"


@pytest.mark.parametrize("alt_m", [None, 40.0])
def test_gpx_is_version_1_1_in_schema_order(planned, tmp_path, alt_m):
    site, _grid, _model, routes = planned
    path = write_gpx(routes, tmp_path / "routes.gpx", alt_m=alt_m)
    root = ET.parse(path).getroot()
    assert root.tag == f"{{{GPX_NAMESPACE}}}gpx"
    assert root.get("version") == "1.1" and root.get("creator")
    # GPX 1.1 elements, and inside <extensions> only elements of our own namespace
    inside = {id(e) for ext in root.iter(f"{{{GPX_NAMESPACE}}}extensions") for e in ext.iter() if e is not ext}
    assert all(child.tag.startswith(f"{{{GPX_NAMESPACE}}}") for child in root.iter() if id(child) not in inside)
    assert all(e.tag.startswith(f"{{{GPX_EXTENSION_NAMESPACE}}}") for e in root.iter() if id(e) in inside)
    assert _local(root[0].tag) == "metadata"
    _assert_schema_order(root)
    _assert_schema_order(root.find("g:metadata", NS))
    assert SIMULATION_NOTICE in root.find("g:metadata/g:desc", NS).text
    rtes = root.findall("g:rte", NS)
    assert [r.find("g:name", NS).text for r in rtes] == [r.name for r in routes]
    for rte, route in zip(rtes, routes, strict=True):
        _assert_schema_order(rte)
        assert SIMULATION_NOTICE in rte.find("g:desc", NS).text
        points = rte.findall("g:rtept", NS)
        assert len(points) == len(route.waypoints)
        for pt, w in zip(points, route.waypoints, strict=True):
            _assert_schema_order(pt)
            lat, lon = float(pt.get("lat")), float(pt.get("lon"))
            assert -90.0 <= lat <= 90.0 and -180.0 <= lon < 180.0
            assert_allclose([lon, lat], [w.lon, w.lat], rtol=0, atol=5.1e-10)
            ele = pt.find("g:ele", NS)
            if alt_m is None:
                assert ele is None
            else:
                # no ground elevation: an altitude above ground is no elevation above sea level
                assert ele is None
                assert pt.find("g:cmt", NS).text == f"{alt_m:.3f} m above ground level"
                assert "above ground level" in rte.find("g:desc", NS).text
    x, y = site.frame.to_xy(*zip(*[(float(p.get("lon")), float(p.get("lat")))
                                   for p in rtes[0].findall("g:rtept", NS)], strict=True))
    assert_allclose(np.column_stack([x, y]), routes[0].waypoint_xy(), rtol=0, atol=1e-3)


def test_gpx_time_only_when_given(planned, tmp_path):
    _site, _grid, _model, routes = planned
    assert "<time>" not in write_gpx(routes, tmp_path / "a.gpx").read_text()
    when = datetime(2026, 3, 4, 5, 6, 7, tzinfo=UTC)
    root = ET.parse(write_gpx(routes, tmp_path / "b.gpx", time=when)).getroot()
    assert root.find("g:metadata/g:time", NS).text == "2026-03-04T05:06:07Z"
    _assert_schema_order(root.find("g:metadata", NS))
    with pytest.raises(SettingsError, match="timezone-aware"):
        write_gpx(routes, tmp_path / "c.gpx", time=datetime(2026, 3, 4))


# ----------------------------------------------------------------------------- every file


def _write_all(site, routes, folder, alt_m=None):
    folder.mkdir(exist_ok=True)
    return [
        write_geojson(routes, folder / "routes.geojson", site=site, alt_m=alt_m),
        write_csv(routes[0], folder / "shortest.csv", alt_m=alt_m),
        write_gpx(routes, folder / "routes.gpx", alt_m=alt_m),
    ]


@pytest.mark.parametrize("alt_m", [None, 25.0])
def test_every_file_carries_the_notice(planned, tmp_path, alt_m):
    site, _grid, _model, routes = planned
    for path in _write_all(site, routes, tmp_path, alt_m):
        text = path.read_text(encoding="utf-8")
        assert SIMULATION_NOTICE in text, path.name
        assert ("above ground level" in text) == (alt_m is not None), path.name


def test_files_are_deterministic_and_leave_no_temporaries(planned, tmp_path):
    site, _grid, _model, routes = planned
    first = _write_all(site, routes, tmp_path / "one", alt_m=10.0)
    second = _write_all(site, routes, tmp_path / "two", alt_m=10.0)
    for a, b in zip(first, second, strict=True):
        assert a.read_bytes() == b.read_bytes(), a.name
    # Writing again over the same names replaces the files, byte for byte.
    again = _write_all(site, routes, tmp_path / "one", alt_m=10.0)
    assert [p.read_bytes() for p in again] == [p.read_bytes() for p in second]
    assert sorted(p.name for p in (tmp_path / "one").iterdir()) == ["routes.geojson", "routes.gpx", "shortest.csv",
                                                                     "shortest.txt"]


def test_export_routes_writes_one_file_per_policy_and_format(planned, tmp_path):
    site, _grid, _model, routes = planned
    written = export_routes(routes, tmp_path, site=site, formats=("geojson", "csv", "gpx"))
    assert [p.name for p in written] == [
        "routes-shortest.geojson", "waypoints-shortest.csv", "routes-shortest.gpx",
        "routes-fewest-moves.geojson", "waypoints-fewest-moves.csv", "routes-fewest-moves.gpx",
    ]
    with pytest.raises(SettingsError, match="export.formats 'kml' is not one of geojson, csv, gpx"):
        export_routes(routes, tmp_path, site=site, formats=("kml",))


def test_bad_inputs_are_refused_and_write_nothing(planned, tmp_path):
    site, _grid, _model, routes = planned
    with pytest.raises(SettingsError, match=r"export.alt_m must be a number of metres above ground in \[0, 10000\]"):
        write_geojson(routes, tmp_path / "x.geojson", site=site, alt_m=-1.0)
    with pytest.raises(SettingsError, match=r"export.alt_m must be a number of metres above ground in \[0, 10000\]"):
        write_csv(routes[0], tmp_path / "x.csv", alt_m=float("nan"))
    with pytest.raises(SettingsError, match="policy name"):
        write_gpx([routes[0], routes[0]], tmp_path / "x.gpx")
    with pytest.raises(SettingsError, match="no route"):
        write_gpx([], tmp_path / "x.gpx")
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(RunFolderError, match="does not exist"):
        write_csv(routes[0], tmp_path / "missing" / "x.csv")
    (tmp_path / "bad.geojson").write_text('{"type": "Feature"}')
    with pytest.raises(RunFolderError, match="FeatureCollection"):
        read_waypoints_geojson(tmp_path / "bad.geojson")
    with pytest.raises(RunFolderError, match="cannot read"):
        read_waypoints_geojson(tmp_path / "absent.geojson")
