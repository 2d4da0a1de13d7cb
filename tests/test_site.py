"""Site loading: the demo sites, the working frame, and the bad-input catalogue."""

from __future__ import annotations

import copy
import importlib.util
import itertools
import json
import math
import re
import warnings
from pathlib import Path

import numpy as np
import pytest
from conftest import feature, point, rect, to_lonlat, to_projected
from geographiclib.geodesic import Geodesic
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from pyproj import Transformer

from planner.errors import SettingsError, SiteError, SiteWarning
from planner.site import Frame, load_site, site_from_geojson

MAPS = Path(__file__).resolve().parent.parent / "maps"
DEMOS = ("ground-yard", "drone-range")

#: The National Grid of Great Britain (OSGB 1936 on the Airy 1830 ellipsoid), written
#: as plain PROJ text so that no datum shift is involved: the references below are
#: pure projection examples on that ellipsoid.
NATIONAL_GRID = ("+proj=tmerc +lat_0=49 +lon_0=-2 +k=0.9996012717 +x_0=400000 +y_0=-100000 "
                 "+ellps=airy +units=m +no_defs +type=crs")


def demo_path(name: str) -> Path:
    return MAPS / f"{name}.geojson"


def demo_collection(name: str) -> dict:
    return json.loads(demo_path(name).read_text())


def load_quietly(name: str):
    """Load a demo site, turning any SiteWarning into a failure."""
    with warnings.catch_warnings():
        warnings.simplefilter("error", SiteWarning)
        return load_site(demo_path(name))


def all_positions(coordinates):
    """Every [lon, lat(, alt)] position in a GeoJSON coordinates array."""
    if coordinates and isinstance(coordinates[0], (int, float)):
        return [coordinates]
    return [p for child in coordinates for p in all_positions(child)]


def dms(degrees: int, minutes: int, seconds: float) -> float:
    return degrees + minutes / 60.0 + seconds / 3600.0


# ----------------------------------------------------------------------------- demo sites


@pytest.mark.parametrize("name", DEMOS)
def test_demo_site_loads_without_warnings(name):
    site = load_quietly(name)
    width, height = site.extent_m
    assert 200.0 <= width <= 600.0 and 200.0 <= height <= 600.0
    assert site.warnings == ()
    assert len(site.hazards) >= 3 and len(site.drifts) >= 1
    assert site.boundary.covers(site.start)
    assert site.boundary.intersects(site.goal)
    assert len({z.name for z in site.zones}) == len(site.zones)


def test_ground_yard_has_the_described_zones():
    site = load_quietly("ground-yard")
    names = {z.name: z for z in site.zones}
    slope = names["Embankment side-slope"]
    assert slope.role == "drift" and slope.toward_deg == 180.0 and slope.drift_per_m > 0 and 0 < slope.chance < 1
    assert names["Gravel apron"].role == "rough" and names["Gravel apron"].cost_factor > 1
    assert names["Settling pond"].buffer_m > 0
    assert names["Cable trench"].ends_run is False
    # The drop edge is long and thin, and lies beside the straight line start -> goal.
    drop = names["Loading-dock drop edge"].geometry
    x0, y0, x1, y1 = drop.bounds
    assert (x1 - x0) > 40 * (y1 - y0)
    from shapely.geometry import LineString

    straight = LineString([site.start, site.goal])
    assert 0 < straight.distance(drop) < 25.0
    assert straight.intersects(slope.geometry)


def test_drone_range_has_the_described_zones():
    site = load_quietly("drone-range")
    names = {z.name: z for z in site.zones}
    gusts = names["Hangar gap gusts"]
    # The file states the gusts' origin (weather convention, from the north); the
    # site keeps the direction they push toward.
    drawn = {f["properties"]["name"]: f["properties"] for f in demo_collection("drone-range")["features"]}
    assert drawn["Hangar gap gusts"]["from_deg"] == 0.0 and "toward_deg" not in drawn["Hangar gap gusts"]
    assert gusts.toward_deg == 180.0
    assert names["Radio mast"].buffer_m > 0
    assert site.goal.geom_type == "Polygon"
    from shapely.geometry import LineString

    straight = LineString([site.start, site.goal.centroid])
    gap = names["North hangar"].geometry.distance(names["South hangar"].geometry)
    assert 10.0 < gap < 40.0
    assert straight.intersects(gusts.geometry)
    assert not straight.intersects(names["North hangar"].geometry)
    assert not straight.intersects(names["South hangar"].geometry)


@pytest.mark.parametrize("name", DEMOS)
def test_demo_files_follow_rfc7946(name):
    collection = demo_collection(name)
    assert "crs" not in collection
    for item in collection["features"]:
        geometry = item["geometry"]
        for lon, lat in (p[:2] for p in all_positions(geometry["coordinates"])):
            # Seven decimals at most: the generator rounds to about a centimetre.
            assert round(lon, 7) == lon and round(lat, 7) == lat
        if geometry["type"] == "Polygon":
            exterior = np.asarray(geometry["coordinates"][0])
            assert exterior[0].tolist() == exterior[-1].tolist()
            # RFC 7946 section 3.1.6: exterior rings counter-clockwise (positive shoelace area).
            x, y = exterior[:, 0], exterior[:, 1]
            assert np.sum(x[:-1] * y[1:] - x[1:] * y[:-1]) > 0


def test_generator_reproduces_the_shipped_files(tmp_path):
    spec = importlib.util.spec_from_file_location("make_demos", MAPS / "make_demos.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    module.main(tmp_path)
    for name in DEMOS:
        made = json.loads((tmp_path / f"{name}.geojson").read_text())
        shipped = demo_collection(name)
        assert len(made["features"]) == len(shipped["features"])
        for a, b in zip(made["features"], shipped["features"], strict=True):
            assert a["properties"] == b["properties"]
            assert a["geometry"]["type"] == b["geometry"]["type"]
            # Another PROJ build may round a last digit the other way; 1.5e-7 degrees
            # is under 2 cm.
            assert_allclose(all_positions(a["geometry"]["coordinates"]),
                            all_positions(b["geometry"]["coordinates"]), atol=1.5e-7, rtol=0)


# ----------------------------------------------------------------------------- frames


def test_transverse_mercator_matches_iogp_guidance_note_example():
    # IOGP Publication 373-7-2, "Geomatics Guidance Note 7, part 2: Coordinate
    # Conversions and Transformations including Formulas", section on the Transverse
    # Mercator projection, worked example (OSGB 1936 / British National Grid):
    # latitude 50d30'N, longitude 0d30'E -> E 577274.99 m, N 69740.50 m.
    # Values from memory, quoted to the centimetre; our frame lands 6 mm (E) and
    # 8 mm (N) from them, so the check holds them to 1 cm.
    frame = Frame(crs=NATIONAL_GRID, kind="named", lon_0=-2.0, lat_0=49.0)
    east, north = frame.to_xy([dms(0, 30, 0.0)], [dms(50, 30, 0.0)])
    assert_allclose(east, [577274.99], atol=0.01, rtol=0)
    assert_allclose(north, [69740.50], atol=0.01, rtol=0)
    lon, lat = frame.to_lonlat([577274.99], [69740.50])
    # 1 cm is about 1.4e-7 degrees of longitude and 0.9e-7 of latitude here.
    assert_allclose(lon, [0.5], atol=2e-7, rtol=0)
    assert_allclose(lat, [50.5], atol=2e-7, rtol=0)


def test_transverse_mercator_matches_ordnance_survey_example():
    # Ordnance Survey, "A guide to coordinate systems in Great Britain", Annexe C
    # (transverse Mercator formulae), worked example: latitude 52d39'27.2531"N,
    # longitude 1d43'4.5177"E on Airy 1830 -> E 651409.903 m, N 313177.270 m.
    # Values from memory.
    frame = Frame(crs=NATIONAL_GRID, kind="named", lon_0=-2.0, lat_0=49.0)
    east, north = frame.to_xy([dms(1, 43, 4.5177)], [dms(52, 39, 27.2531)])
    assert_allclose(east, [651409.903], atol=0.001, rtol=0)
    assert_allclose(north, [313177.270], atol=0.001, rtol=0)


@pytest.mark.parametrize("name", DEMOS)
def test_projected_distances_match_geodesics(name):
    # Geodesic distances from C. F. F. Karney, "Algorithms for geodesics", J. Geodesy
    # 87 (2013) 43-55, as implemented in geographiclib. A conformal transverse
    # Mercator with k0 = 1 stretches lengths by its point scale k, and
    # k - 1 ~ x^2 / (2 R^2) is about 1e-9 within 300 m of the central meridian, so
    # straight-line distances in the frame must agree with geodesics to that order;
    # we allow 1e-8 (measured: at most 1.2e-9).
    site = load_quietly(name)
    positions = np.asarray([p[:2] for f in demo_collection(name)["features"]
                            for p in all_positions(f["geometry"]["coordinates"])], dtype=float)
    x, y = site.frame.to_xy(positions[:, 0], positions[:, 1])
    projected, geodesic = [], []
    for i, j in itertools.combinations(range(len(positions)), 2):
        result = Geodesic.WGS84.Inverse(positions[i, 1], positions[i, 0], positions[j, 1], positions[j, 0])
        if result["s12"] < 10.0:
            continue
        geodesic.append(result["s12"])
        projected.append(math.hypot(x[i] - x[j], y[i] - y[j]))
    assert len(geodesic) > 500
    assert_allclose(projected, geodesic, rtol=1e-8, atol=0)


def snyder_point_scale(lon, lat, lon_0, k0=1.0):
    """Point scale of the ellipsoidal transverse Mercator.

    J. P. Snyder, "Map Projections: A Working Manual", USGS Professional Paper 1395
    (1987), chapter 8, equation (8-11), from memory.
    """
    a_flat = 1.0 / 298.257223563
    e2 = a_flat * (2.0 - a_flat)
    ep2 = e2 / (1.0 - e2)
    phi = np.radians(lat)
    big_a = np.radians(np.asarray(lon) - lon_0) * np.cos(phi)
    c = ep2 * np.cos(phi) ** 2
    t = np.tan(phi) ** 2
    return k0 * (1.0 + (1.0 + c) * big_a**2 / 2.0
                 + (5.0 - 4.0 * t + 42.0 * c + 13.0 * c**2 - 28.0 * ep2) * big_a**4 / 24.0
                 + (61.0 - 148.0 * t + 16.0 * t**2) * big_a**6 / 720.0)


@pytest.mark.parametrize("name", DEMOS)
def test_demo_scale_distortion_is_small_and_as_the_closed_form_says(name):
    site = load_quietly(name)
    ring = np.asarray(demo_collection(name)["features"][0]["geometry"]["coordinates"][0], dtype=float)
    expected = np.max(np.abs(snyder_point_scale(ring[:, 0], ring[:, 1], site.frame.lon_0) - 1.0))
    assert site.scale_distortion < 1e-8
    # PROJ finds the point scale by numerical differentiation, good to a few percent
    # of a 1e-9 distortion (measured: within 2%).
    assert_allclose(site.scale_distortion, expected, rtol=0.1)


def test_named_utm_frame_reports_its_scale_distortion(site_dict):
    # UTM zone 32N: central meridian 9E, k0 = 0.9996; the test site lies at 9.25E,
    # where |k - 1| is about 4e-4, so the comparison is far above round-off.
    site = site_from_geojson(site_dict, crs="EPSG:32632")
    ring = np.asarray(site_dict["features"][0]["geometry"]["coordinates"][0], dtype=float)
    expected = np.max(np.abs(snyder_point_scale(ring[:, 0], ring[:, 1], 9.0, k0=0.9996) - 1.0))
    assert site.frame.kind == "named"
    assert_allclose(site.scale_distortion, expected, rtol=1e-6)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.floats(-2000.0, 2000.0), st.floats(-2000.0, 2000.0)), min_size=1, max_size=20))
def test_metres_lonlat_round_trip_within_a_millimetre(points):
    frame = Frame(crs=("+proj=tmerc +lat_0=46.8421 +lon_0=2.7134 +k=1 +x_0=0 +y_0=0 +ellps=WGS84 "
                       "+units=m +no_defs +type=crs"), kind="local-tmerc", lon_0=2.7134, lat_0=46.8421)
    x, y = np.asarray(points).T
    lon, lat = frame.to_lonlat(x, y)
    x2, y2 = frame.to_xy(lon, lat)
    assert_allclose(x2, x, atol=1e-3, rtol=0)
    assert_allclose(y2, y, atol=1e-3, rtol=0)
    # And lon/lat -> metres -> lon/lat, measured in metres along the ground.
    lon2, lat2 = frame.to_lonlat(x2, y2)
    metres_per_degree = 111_000.0
    assert_allclose((lon2 - lon) * metres_per_degree * np.cos(np.radians(lat)), 0.0, atol=1e-3)
    assert_allclose((lat2 - lat) * metres_per_degree, 0.0, atol=1e-3)


# ----------------------------------------------------------------------------- bad files


def _nan_site_text(site_dict, literal):
    text = json.dumps(site_dict)
    lon = json.dumps(site_dict["features"][1]["geometry"]["coordinates"][0])
    return text.replace(lon, literal, 1).encode()


BAD_FILES = [
    ("not-json", lambda d: b"{this is not json", r"not valid JSON \(line 1, column 2"),
    ("empty", lambda d: b"", r"file is empty"),
    ("only-whitespace", lambda d: b"  \n\t\n", r"file is empty"),
    ("binary-junk", lambda d: bytes(range(256)) * 4, r"not a text file \(byte 128 is not UTF-8\)"),
    ("json-array", lambda d: b"[1, 2, 3]", r"not a GeoJSON FeatureCollection \(found 'list'\)"),
    ("a-feature", lambda d: json.dumps(d["features"][1]).encode(),
     r"not a GeoJSON FeatureCollection \(found 'Feature'\)"),
    # Python's json module accepts these literals; GeoJSON (RFC 8259 JSON) does not.
    ("nan-literal", lambda d: _nan_site_text(d, "NaN"), r"JSON contains NaN, which GeoJSON does not allow"),
    ("infinity-literal", lambda d: _nan_site_text(d, "Infinity"), r"JSON contains Infinity"),
    ("minus-infinity-literal", lambda d: _nan_site_text(d, "-Infinity"), r"JSON contains -Infinity"),
]


@pytest.mark.parametrize(("case", "make", "message"), BAD_FILES, ids=[c[0] for c in BAD_FILES])
def test_bad_site_files_are_refused(tmp_path, site_dict, case, make, message):
    path = tmp_path / f"{case}.geojson"
    path.write_bytes(make(site_dict))
    with pytest.raises(SiteError, match=message) as info:
        load_site(path)
    assert str(path) in str(info.value)
    assert "\n" not in str(info.value)


def test_missing_file_is_a_site_error(tmp_path):
    with pytest.raises(SiteError, match="cannot read the site file"):
        load_site(tmp_path / "nowhere.geojson")


def test_oversized_file_is_refused_before_parsing(tmp_path, site_dict):
    path = tmp_path / "site.geojson"
    path.write_text(json.dumps(site_dict))
    with pytest.raises(SiteError, match="over the 100-byte limit"):
        load_site(path, max_bytes=100)


def test_shipped_broken_file_is_refused():
    # tests/data holds a drawn site with a bow-tie hazard, as a user's editor would save it.
    path = Path(__file__).resolve().parent / "data" / "bow-tie-hazard.geojson"
    with pytest.raises(SiteError, match=r"feature 3 \('Crossed fence'\): invalid polygon \(Self-intersection"):
        load_site(path)
    with pytest.warns(SiteWarning, match=r"feature 3 \('Crossed fence'\): repaired an invalid polygon"):
        site = load_site(path, fix=True)
    assert site.hazards[0].geometry.area > 0


# ----------------------------------------------------------------------------- bad content
#
# Features of the conftest site: 0 boundary 'Test yard', 1 start 'Launch', 2 goal
# 'Target', 3 hazard 'Pond' (2 m buffer), 4 drift 'Gust lane', 5 rough 'Gravel'.


def set_prop(index, key, value):
    def change(d):
        d["features"][index]["properties"][key] = value
    return change


def drop_prop(index, key):
    def change(d):
        del d["features"][index]["properties"][key]
    return change


def set_geometry(index, kind, coordinates):
    def change(d):
        d["features"][index]["geometry"] = {"type": kind, "coordinates": coordinates}
    return change


def drop_feature(index):
    def change(d):
        del d["features"][index]
    return change


def add_feature(role, kind, coordinates, **props):
    def change(d):
        d["features"].append(feature(role, kind, coordinates, **props))
    return change


def set_position(index, position):
    return set_geometry(index, "Point", position)


def set_top(key, value):
    def change(d):
        d[key] = value
    return change


BOW_TIE = [to_lonlat([(40, 20), (60, 40), (60, 20), (40, 40), (40, 20)])]
HOLE_OUTSIDE = rect(40, 20, 60, 40) + [to_lonlat([(70, 20), (70, 25), (75, 25), (75, 20), (70, 20)])]
DEGENERATE = [to_lonlat([(40, 20), (60, 20), (40, 20), (40, 20)])]

BAD_CONTENT = [
    ("not-a-collection", set_top("type", "GeometryCollection"),
     SiteError, r"not a GeoJSON FeatureCollection \(found 'GeometryCollection'\)"),
    ("features-not-a-list", set_top("features", {}), SiteError, r"'features' must be a list"),
    ("crs-member", set_top("crs", {"type": "name", "properties": {"name": "EPSG:999999"}}),
     SiteError, r"has a 'crs' member naming 'EPSG:999999', which pyproj cannot resolve; delete the member if the "
                r"positions are WGS 84 lon/lat, name the CRS as 'EPSG:NNNN'"),
    ("crs-member-vertical", set_top("crs", {"type": "name", "properties": {"name": "EPSG:5773"}}),
     SiteError, r"naming 'EPSG:5773', a Vertical CRS, not a horizontal CRS"),
    ("no-boundary", drop_feature(0), SiteError, r"no feature with role 'boundary' \(exactly one is required\)"),
    ("two-boundaries", add_feature("boundary", "Polygon", rect(0, 0, 50, 50), name="Second yard"),
     SiteError, r"2 features with role 'boundary' \(feature 0 \('Test yard'\) and feature 6 \('Second yard'\)\)"),
    ("no-start", drop_feature(1), SiteError, r"no feature with role 'start'"),
    ("no-goal", drop_feature(2), SiteError, r"no feature with role 'goal'"),
    ("two-goals", add_feature("goal", "Point", point(80, 10), name="Second target"),
     SiteError, r"2 features with role 'goal' \(feature 2 \('Target'\) and feature 6 \('Second target'\)\)"),
    ("start-outside", set_position(1, point(150, 30)),
     SiteError, r"feature 1 \('Launch'\): start lies outside the boundary"),
    ("goal-outside", set_position(2, point(90, 90)),
     SiteError, r"feature 2 \('Target'\): goal lies outside the boundary"),
    ("start-in-hazard", set_position(1, point(50, 30)),
     SiteError, r"feature 1 \('Launch'\): start lies inside hazard feature 3 \('Pond'\)"),
    ("goal-in-hazard", set_position(2, point(55, 25)),
     SiteError, r"feature 2 \('Target'\): goal lies inside hazard feature 3 \('Pond'\)"),
    ("start-in-buffer", set_position(1, point(39, 30)),
     SiteError, r"feature 1 \('Launch'\): start lies inside the 2 m buffer of hazard feature 3 \('Pond'\)"),
    ("start-is-goal", set_position(2, point(10, 30)),
     SiteError, r"feature 1 \('Launch'\): start is at the goal"),
    ("goal-area-covers-start", set_geometry(2, "Polygon", rect(5, 25, 15, 35)),
     SiteError, r"feature 1 \('Launch'\): start is at the goal"),
    ("unknown-role", set_prop(3, "role", "lava"),
     SiteError, r"feature 3 \('Pond'\): unknown role 'lava'; expected one of boundary, hazard"),
    ("missing-role", drop_prop(3, "role"), SiteError, r"feature 3 \('Pond'\): unknown role None"),
    ("unknown-property", set_prop(3, "colour", "red"),
     SiteError, r"feature 3 \('Pond'\): unknown property 'colour' for role 'hazard' \(allowed: "),
    ("property-of-another-role", set_prop(5, "push_m", 2.0),
     SiteError, r"feature 5 \('Gravel'\): unknown property 'push_m' for role 'rough'"),
    ("start-as-polygon", set_geometry(1, "Polygon", rect(5, 25, 15, 35)),
     SiteError, r"feature 1 \('Launch'\): role 'start' needs geometry Point, found 'Polygon'"),
    ("hazard-as-point", set_position(3, point(50, 30)),
     SiteError, r"feature 3 \('Pond'\): role 'hazard' needs geometry Polygon or MultiPolygon, found 'Point'"),
    ("boundary-as-line", set_geometry(0, "LineString", to_lonlat([(0, 0), (100, 60)])),
     SiteError, r"feature 0 \('Test yard'\): role 'boundary' needs geometry Polygon or MultiPolygon"),
    ("goal-as-multipolygon", set_geometry(2, "MultiPolygon", [rect(85, 25, 95, 35), rect(70, 25, 75, 35)]),
     SiteError, r"feature 2 \('Target'\): role 'goal' needs geometry Point or Polygon, found 'MultiPolygon'"),
    ("no-geometry", set_top("features", [feature("boundary", "Polygon", rect(0, 0, 100, 60), name="Test yard")]
                            + [{"type": "Feature", "properties": {"role": "start", "name": "Launch"},
                                "geometry": None}]),
     SiteError, r"feature 1 \('Launch'\): role 'start' needs geometry Point, found None"),
    ("nan-longitude", set_position(1, [float("nan"), 47.4]),
     SiteError, r"feature 1 \('Launch'\): a coordinate is not finite \(nan\)"),
    ("inf-latitude", set_position(1, [9.25, float("inf")]),
     SiteError, r"feature 1 \('Launch'\): a coordinate is not finite \(inf\)"),
    ("longitude-out-of-range", set_position(1, [190.0, 47.4]),
     SiteError, r"feature 1 \('Launch'\): longitude 190.0 is outside \[-180, 180\] \(positions are lon, lat\)"),
    ("latitude-out-of-range", set_position(1, [9.25, -91.0]),
     SiteError, r"feature 1 \('Launch'\): latitude -91.0 is outside \[-90, 90\]"),
    ("lat-lon-swapped", set_position(1, [47.4, 109.25]),
     SiteError, r"feature 1 \('Launch'\): latitude 109.25 is outside \[-90, 90\] \(positions are lon, lat\) and "
                r"looks swapped: GeoJSON positions are \[lon, lat\]"),
    ("projected-metres", set_position(1, [512345.0, 5250000.0]),
     SiteError, r"feature 1 \('Launch'\): position \[512345.0, 5250000.0\] looks projected \(metres, not "
                r"degrees\); reproject the file to WGS 84 longitude/latitude"),
    ("coordinate-not-a-number", set_position(1, ["9.25", 47.4]),
     SiteError, r"feature 1 \('Launch'\): a coordinate is not a number"),
    ("four-numbers", set_position(1, point(10, 30) + [0.0, 1.0]),
     SiteError, r"feature 1 \('Launch'\): a position must be \[lon, lat\] or \[lon, lat, alt\]"),
    ("ring-not-closed", set_geometry(3, "Polygon", [rect(40, 20, 60, 40)[0][:-1] + [point(41, 20)]]),
     SiteError, r"feature 3 \('Pond'\): a polygon ring is not closed"),
    ("ring-too-short", set_geometry(3, "Polygon", [to_lonlat([(40, 20), (60, 20), (40, 20)])]),
     SiteError, r"feature 3 \('Pond'\): a polygon ring has 3 positions; RFC 7946 needs at least 4"),
    ("empty-multipolygon", set_geometry(3, "MultiPolygon", []),
     SiteError, r"feature 3 \('Pond'\): MultiPolygon coordinates are malformed"),
    ("bow-tie", set_geometry(3, "Polygon", BOW_TIE),
     SiteError, r"feature 3 \('Pond'\): invalid polygon \(Self-intersection.*\); fix the drawing or pass load_site\.fix"),
    ("hole-outside-shell", set_geometry(3, "Polygon", HOLE_OUTSIDE),
     SiteError, r"feature 3 \('Pond'\): invalid polygon \(Hole lies outside shell"),
    ("zero-area-ring", set_geometry(3, "Polygon", DEGENERATE),
     SiteError, r"feature 3 \('Pond'\): invalid polygon \(Too few points"),
    ("both-directions", set_prop(4, "from_deg", 0.0),
     SiteError, r"feature 4 \('Gust lane'\): drift zone has both of 'toward_deg'/'from_deg'; give exactly one"),
    ("neither-direction", drop_prop(4, "toward_deg"),
     SiteError, r"feature 4 \('Gust lane'\): drift zone has neither of 'toward_deg'/'from_deg'"),
    ("direction-over-360", set_prop(4, "toward_deg", 361.0),
     SiteError, r"feature 4 \('Gust lane'\): 'toward_deg' must be <= 360, got 361"),
    ("negative-direction", set_prop(4, "toward_deg", -5.0),
     SiteError, r"feature 4 \('Gust lane'\): 'toward_deg' must be >= 0, got -5"),
    ("no-drift", drop_prop(4, "drift_per_m"), SiteError,
     r"feature 4 \('Gust lane'\): drift zone needs 'drift_per_m'"),
    ("negative-drift", set_prop(4, "drift_per_m", -1.0),
     SiteError, r"feature 4 \('Gust lane'\): 'drift_per_m' must be >= 0, got -1"),
    ("negative-spread", set_prop(4, "spread_per_sqrt_m", -0.5),
     SiteError, r"feature 4 \('Gust lane'\): 'spread_per_sqrt_m' must be >= 0, got -0.5"),
    ("drift-not-a-number", set_prop(4, "drift_per_m", "3"),
     SiteError, r"feature 4 \('Gust lane'\): 'drift_per_m' must be a finite number, got '3'"),
    ("drift-is-boolean", set_prop(4, "drift_per_m", True),
     SiteError, r"feature 4 \('Gust lane'\): 'drift_per_m' must be a finite number, got True"),
    ("drift-is-nan", set_prop(4, "drift_per_m", float("nan")),
     SiteError, r"feature 4 \('Gust lane'\): 'drift_per_m' must be a finite number, got nan"),
    ("drift-per-move", set_prop(4, "push_m", 1.5), SiteError,
     r"feature 4 \('Gust lane'\): property 'push_m' \(per move\) is from site schema 1 and was replaced by "
     r"'drift_per_m'"),
    ("spread-per-move", set_prop(4, "spread_m", 1.0), SiteError,
     r"feature 4 \('Gust lane'\): property 'spread_m' \(per move\) is from site schema 1 and was replaced by "
     r"'spread_per_sqrt_m'"),
    ("chance-above-one", set_prop(4, "chance", 1.5),
     SiteError, r"feature 4 \('Gust lane'\): 'chance' must be <= 1, got 1.5"),
    ("chance-below-zero", set_prop(4, "chance", -0.1),
     SiteError, r"feature 4 \('Gust lane'\): 'chance' must be >= 0, got -0.1"),
    ("negative-buffer", set_prop(3, "buffer_m", -2.0),
     SiteError, r"feature 3 \('Pond'\): 'buffer_m' must be >= 0, got -2"),
    ("negative-penalty", set_prop(3, "penalty_m", -10.0),
     SiteError, r"feature 3 \('Pond'\): 'penalty_m' must be >= 0, got -10"),
    ("ends-run-not-boolean", set_prop(3, "ends_run", "yes"),
     SiteError, r"feature 3 \('Pond'\): 'ends_run' must be true or false \(or 1 or 0\), got 'yes'"),
    ("ends-run-two", set_prop(3, "ends_run", 2),
     SiteError, r"feature 3 \('Pond'\): 'ends_run' must be true or false \(or 1 or 0\), got 2"),
    ("unknown-property-not-null", set_prop(0, "buffer_m", 0.0),
     SiteError, r"feature 0 \('Test yard'\): unknown property 'buffer_m' for role 'boundary'"),
    ("cost-factor-below-one", set_prop(5, "cost_factor", 0.5),
     SiteError, r"feature 5 \('Gravel'\): 'cost_factor' must be >= 1, got 0.5"),
    ("no-cost-factor", drop_prop(5, "cost_factor"),
     SiteError, r"feature 5 \('Gravel'\): rough zone needs 'cost_factor' \(>= 1\)"),
    ("duplicate-zone-name", set_prop(5, "name", "Pond"),
     SiteError, r"feature 5 \('Pond'\): zone name 'Pond' is already used by feature 3 \('Pond'\)"),
    ("name-not-a-string", set_prop(3, "name", 7),
     SiteError, r"feature 3 \('#3'\): 'name' must be a string"),
    ("feature-not-an-object", set_top("features", ["boundary"]), SiteError, r"feature 0: not a GeoJSON Feature"),
    ("no-properties", set_top("features", [{"type": "Feature", "geometry": None}]),
     SiteError, r"feature 0: has no 'properties' object"),
]


@pytest.mark.parametrize(("case", "change", "error", "message"), BAD_CONTENT, ids=[c[0] for c in BAD_CONTENT])
def test_bad_site_content_is_refused(site_dict, case, change, error, message):
    change(site_dict)
    with pytest.raises(error, match=message) as info:
        site_from_geojson(site_dict, source="yard.geojson")
    text = str(info.value)
    assert text.startswith("yard.geojson: ")
    assert "\n" not in text


def test_antimeridian_straddling_boundary_is_refused():
    # A yard on an island astride the 180th meridian: its longitudes jump from +179.99
    # to -179.99, which no single local frame built from lon/lat bounds can hold.
    to_ll = Transformer.from_crs("+proj=tmerc +lat_0=-16.8 +lon_0=180 +k=1 +ellps=WGS84 +units=m", "EPSG:4326",
                                 always_xy=True)

    def ll(points):
        return [list(to_ll.transform(x, y)) for x, y in points]

    ring = ll([(-50, -30), (50, -30), (50, 30), (-50, 30), (-50, -30)])
    assert ring[0][0] > 179.0 and ring[1][0] < -179.0
    site = {"type": "FeatureCollection", "features": [
        feature("boundary", "Polygon", [ring], name="Island yard"),
        feature("start", "Point", ll([(-40, 0)])[0], name="Launch"),
        feature("goal", "Point", ll([(40, 0)])[0], name="Target"),
    ]}
    with pytest.raises(SiteError, match=r"feature 0 \('Island yard'\): boundary spans more than 180 degrees"
                                        r" of longitude \(it straddles the antimeridian\)"):
        site_from_geojson(site)


@pytest.mark.parametrize(("crs", "message"), [
    ("EPSG:4326", r"load_site\.crs 'EPSG:4326': is not a projected CRS"),
    ("not a crs at all", r"load_site\.crs 'not a crs at all': not a coordinate reference system"),
    ("EPSG:2229", r"load_site\.crs 'EPSG:2229': axis units are US survey foot, not metres"),
], ids=["geographic", "unknown", "in-feet"])
def test_unsuitable_named_frames_are_refused(site_dict, crs, message):
    with pytest.raises(SettingsError, match=message):
        site_from_geojson(site_dict, crs=crs)


def test_bow_tie_loads_with_fix_and_a_warning(site_dict):
    set_geometry(3, "Polygon", BOW_TIE)(site_dict)
    with pytest.warns(SiteWarning, match=r"feature 3 \('Pond'\): repaired an invalid polygon \(Self-intersection"):
        site = site_from_geojson(site_dict, fix=True)
    pond = site.hazards[0].geometry
    # make_valid keeps both lobes of the bow-tie: two triangles of 20 m x 10 m / 2 each.
    assert pond.geom_type == "MultiPolygon" and len(pond.geoms) == 2
    assert_allclose(pond.area, 200.0, rtol=1e-3)
    assert any("repaired" in w for w in site.warnings)


def test_fix_cannot_rescue_a_polygon_without_area(site_dict):
    set_geometry(3, "Polygon", DEGENERATE)(site_dict)
    with pytest.raises(SiteError, match=r"feature 3 \('Pond'\): invalid polygon .* repairing it leaves no area"):
        site_from_geojson(site_dict, fix=True)


def test_collinear_ring_is_refused_as_zero_area(site_dict):
    set_geometry(3, "Polygon", [to_lonlat([(40, 20), (50, 20), (60, 20), (40, 20)])])(site_dict)
    with pytest.raises(SiteError, match=r"feature 3 \('Pond'\): .*zero area"):
        site_from_geojson(site_dict)


def test_huge_integer_coordinate_is_a_site_error(tmp_path, site_dict):
    text = json.dumps(site_dict).replace(json.dumps(site_dict["features"][1]["geometry"]["coordinates"][0]),
                                         "1" * 400, 1)
    path = tmp_path / "huge.geojson"
    path.write_text(text)
    with pytest.raises(SiteError, match=r"feature 1 \('Launch'\)"):
        load_site(path)


# ----------------------------------------------------------------------------- accepted variants


def test_altitude_is_accepted_and_ignored(site_dict):
    flat = site_from_geojson(copy.deepcopy(site_dict))

    def add_altitude(coordinates):
        if coordinates and isinstance(coordinates[0], (int, float)):
            return list(coordinates) + [412.5]
        return [add_altitude(c) for c in coordinates]

    for item in site_dict["features"]:
        item["geometry"]["coordinates"] = add_altitude(item["geometry"]["coordinates"])
    raised = site_from_geojson(site_dict)
    assert not raised.boundary.has_z and not raised.start.has_z
    assert raised.boundary.equals_exact(flat.boundary, 0.0)
    assert raised.start.equals_exact(flat.start, 0.0)
    for a, b in zip(raised.zones, flat.zones, strict=True):
        assert a.geometry.equals_exact(b.geometry, 0.0)


def test_clockwise_exterior_rings_are_accepted(site_dict):
    ccw = site_from_geojson(copy.deepcopy(site_dict))
    for index in (0, 3, 4, 5):
        ring = site_dict["features"][index]["geometry"]["coordinates"][0]
        site_dict["features"][index]["geometry"]["coordinates"][0] = ring[::-1]
    cw = site_from_geojson(site_dict)
    assert cw.boundary.equals(ccw.boundary)
    assert_allclose(cw.boundary.area, 6000.0, rtol=1e-6)
    for a, b in zip(cw.zones, ccw.zones, strict=True):
        assert a.geometry.equals(b.geometry)


@pytest.mark.parametrize(("from_deg", "toward_deg"), [(0.0, 180.0), (90.0, 270.0), (200.0, 20.0),
                                                       (270.0, 90.0), (360.0, 180.0), (179.5, 359.5)])
def test_from_deg_becomes_toward_deg(site_dict, from_deg, toward_deg):
    props = site_dict["features"][4]["properties"]
    del props["toward_deg"]
    props["from_deg"] = from_deg
    zone = site_from_geojson(site_dict).drifts[0]
    assert_allclose(zone.toward_deg, toward_deg, atol=1e-12)
    # The push vector points where the wind goes: a westerly (from 270) pushes east.
    rad = math.radians(toward_deg)
    assert_allclose(zone.drift_vector(), (1.5 * math.sin(rad), 1.5 * math.cos(rad)), atol=1e-12)


def test_site_geometry_is_in_metres_of_the_drawing(site_dict):
    site = site_from_geojson(site_dict)
    width, height = site.extent_m
    # The conftest drawing is 100 m x 60 m in a frame anchored 50 m west of ours;
    # meridian convergence between the two rotates it by under 1e-5 rad.
    assert_allclose((width, height), (100.0, 60.0), atol=1e-3)
    pond = site.hazards[0]
    assert_allclose(pond.geometry.area, 400.0, rtol=1e-6)
    # A 2 m buffer around a 20 m square: 400 + 4 * 20 * 2 + pi * 2^2 (round corners, polygonal).
    assert_allclose(pond.buffered.area, 400.0 + 160.0 + math.pi * 4.0, rtol=1e-3)
    assert re.fullmatch(r"[0-9a-f]{64}", site.sha256)


# ----------------------------------------------------------------------------- where on Earth


def test_self_intersection_is_located_in_lat_lon(site_dict):
    # the bow-tie's edges (40, 20)-(60, 40) and (60, 20)-(40, 40) cross at (50, 30) m
    # from the test origin; its lon/lat comes from the same local tmerc as the fixture
    lon, lat = to_lonlat([(50.0, 30.0)])[0]
    set_geometry(3, "Polygon", BOW_TIE)(site_dict)
    with pytest.raises(SiteError) as info:
        site_from_geojson(site_dict)
    found = re.search(r"Self-intersection at (\d+\.\d+) N, (\d+\.\d+) E", str(info.value))
    assert found, str(info.value)
    # 1e-6 degrees is about 0.1 m here: the site frame is centred on the boundary, not
    # on the fixture's origin, so the two projections agree to round-off only
    assert_allclose([float(found.group(1)), float(found.group(2))], [lat, lon], atol=1e-6)


def test_legacy_crs_member_naming_lon_lat_is_accepted(site_dict):
    site_dict["crs"] = {"type": "name", "properties": {"name": "urn:ogc:def:crs:OGC:1.3:CRS84"}}
    assert site_from_geojson(site_dict).name == "Test yard"


def _swapped(data):
    def walk(node):
        if node and isinstance(node[0], (int, float)):
            return [node[1], node[0], *node[2:]]
        return [walk(n) for n in node]

    for f in data["features"]:
        f["geometry"]["coordinates"] = walk(f["geometry"]["coordinates"])
    return data


def test_swapped_coordinates_are_named_against_the_crs_area_of_use(site_dict):
    # UTM zone 32N is used from 6 to 12 degrees east (EPSG registry, area of use of
    # EPSG:32632); the test site sits at 9.25 E, 47.40 N, so [lat, lon] puts it at 47.40 E
    with pytest.warns(SiteWarning) as caught:
        site = site_from_geojson(_swapped(site_dict), crs="EPSG:32632")
    text = " ".join(site.warnings)
    assert "the site centre 9.25" in text and "47.40" in text and "lies outside the area of use of --crs" in text
    assert "the coordinates look swapped" in text
    # 38 degrees of longitude off the zone's central meridian (9 E), transverse Mercator's
    # scale is far above 1 + 1e-3 (k grows as 1 + x^2 / 2R^2; common practice)
    assert "the working frame distorts distances by up to" in text
    assert any("look swapped" in str(w.message) for w in caught)


def test_the_right_way_round_raises_no_location_warning(site_dict):
    site = site_from_geojson(site_dict, crs="EPSG:32632")
    assert not [w for w in site.warnings if "area of use" in w or "0 N 0 E" in w or "test yard" in w]
    lon, lat = site.centre_lonlat
    # the fixture's boundary is 100 m x 60 m with its south-west corner at the origin
    centre = to_lonlat([(50.0, 30.0)])[0]
    assert_allclose([lon, lat], centre, atol=1e-6)


def test_a_site_at_null_island_or_of_continental_size_is_warned_about(site_dict):
    near_zero = copy.deepcopy(site_dict)

    def shift(node):
        if node and isinstance(node[0], (int, float)):
            return [node[0] - 9.25, node[1] - 47.40]
        return [shift(n) for n in node]

    for f in near_zero["features"]:
        f["geometry"]["coordinates"] = shift(f["geometry"]["coordinates"])
    with pytest.warns(SiteWarning, match=r"within a degree of 0 N 0 E"):
        site_from_geojson(near_zero)
    # local drawing coordinates read as degrees: 0..0.9 "degrees" is about 100 km
    local = {"type": "FeatureCollection", "features": [
        feature("boundary", "Polygon", [[[0, 0], [0.9, 0], [0.9, 0.6], [0, 0.6], [0, 0]]], name="Local"),
        feature("start", "Point", [0.1, 0.3], name="S"), feature("goal", "Point", [0.8, 0.3], name="G")]}
    with pytest.warns(SiteWarning, match=r"far larger than a test yard"):
        site_from_geojson(local)


# ----------------------------------------------------------------------------- read as GIS editors save


#: Every column a GIS table of the small test site has (a layer stores every feature's
#: attributes in one table).
ALL_COLUMNS = ("role", "name", "ends_run", "penalty_m", "buffer_m", "cost_factor", "toward_deg", "from_deg",
               "drift_per_m", "spread_per_sqrt_m", "chance")


def _zones_as_data(site):
    return [(z.role, z.name, z.ends_run, z.penalty_m, z.buffer_m, z.cost_factor, z.toward_deg, z.drift_per_m,
             z.spread_per_sqrt_m, z.chance, z.geometry.wkt) for z in site.zones]


def test_null_properties_count_as_absent_as_a_gis_table_writes_them(site_dict):
    table = copy.deepcopy(site_dict)
    for f in table["features"]:
        f["properties"] = {c: f["properties"].get(c) for c in ALL_COLUMNS}
    original, read = site_from_geojson(site_dict), site_from_geojson(table)
    assert _zones_as_data(read) == _zones_as_data(original)
    assert read.boundary.equals(original.boundary) and read.start.equals(original.start)


@pytest.mark.parametrize("value", [0, 0.0, 1, 1.0])
def test_zero_and_one_are_booleans_for_ends_run(site_dict, value):
    site_dict["features"][3]["properties"]["ends_run"] = value
    (pond,) = site_from_geojson(site_dict).hazards
    assert pond.ends_run is bool(value)


@pytest.mark.parametrize("name", ["urn:ogc:def:crs:OGC:1.3:CRS84", "EPSG:4326", "urn:ogc:def:crs:EPSG::4326"])
def test_a_crs_member_naming_wgs84_lonlat_is_accepted_with_a_note(site_dict, name):
    plain = site_from_geojson(copy.deepcopy(site_dict))
    site_dict["crs"] = {"type": "name", "properties": {"name": name}}
    site = site_from_geojson(site_dict)
    assert site.boundary.equals(plain.boundary)
    assert len(site.notes) == 1 and name in site.notes[0] and "WGS 84 lon/lat" in site.notes[0]
    assert not site.warnings


def test_a_crs_member_naming_a_projected_crs_is_reprojected_and_said(site_dict):
    plain = site_from_geojson(copy.deepcopy(site_dict))
    site = site_from_geojson(to_projected(site_dict, "EPSG:32632"))
    (note,) = site.notes
    assert "WGS 84 / UTM zone 32N (EPSG:32632)" in note and "reprojected to WGS 84 lon/lat with pyproj" in note
    # the same site to well under a millimetre: UTM there and back is exact to round-off
    assert site.boundary.symmetric_difference(plain.boundary).area < 1e-6
    assert site.start.distance(plain.start) < 1e-6 and site.goal.distance(plain.goal) < 1e-6
    assert_allclose(site.centre_lonlat, plain.centre_lonlat, atol=1e-9)


def test_a_malformed_position_in_a_projected_file_names_the_feature(site_dict):
    data = to_projected(site_dict, "EPSG:32632")
    data["features"][3]["geometry"]["coordinates"][0][1] = [500000.0, "north"]
    with pytest.raises(SiteError, match=r"feature 3 \('Pond'\): a coordinate is not a number"):
        site_from_geojson(data)


def test_geojson_id_bbox_and_a_collection_name_are_accepted(site_dict):
    site_dict["name"] = "yard layer"
    site_dict["bbox"] = [9.2, 47.3, 9.3, 47.5]
    for k, f in enumerate(site_dict["features"]):
        f["id"] = k
        f["bbox"] = [9.2, 47.3, 9.3, 47.5]
    assert site_from_geojson(site_dict).name == "Test yard"


def test_a_one_part_multipolygon_goal_and_multipoint_start_are_their_part(site_dict):
    plain = site_from_geojson(copy.deepcopy(site_dict))
    start = site_dict["features"][1]["geometry"]
    site_dict["features"][1]["geometry"] = {"type": "MultiPoint", "coordinates": [start["coordinates"]]}
    site = site_from_geojson(site_dict)
    assert site.start.equals(plain.start)
    set_geometry(2, "MultiPolygon", [rect(85, 25, 95, 35)])(site_dict)
    assert site_from_geojson(site_dict).goal.geom_type == "Polygon"


def test_duplicate_keys_stay_errors_when_nulls_are_allowed(tmp_path):
    from conftest import small_site_dict

    data = json.dumps(small_site_dict())
    data = data.replace('"buffer_m": 2.0', '"buffer_m": null, "buffer_m": 2.0')
    path = tmp_path / "dup.geojson"
    path.write_text(data)
    with pytest.raises(SiteError, match=r"feature 3 \('Pond'\) properties: key 'buffer_m' appears more than once"):
        load_site(path)
