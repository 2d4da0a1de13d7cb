"""Sites drawn in a GIS editor: GDAL's own files read back, several files merged, the template.

The outside reader and writer here is GDAL itself, through pyogrio (in the test extra):
each demo site is written by GDAL's GeoJSON driver (default options, and RFC7946=YES)
and GeoPackage driver, as a GIS editor saves a layer, and must give the very grid the
original file gives.
"""

from __future__ import annotations

import copy
import json
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from conftest import small_site_dict, to_projected

from planner.cli import cli
from planner.errors import SiteError
from planner.gis import load_sites, merged_text
from planner.grid import GridSpec, default_cell_m, rasterise
from planner.site import load_site

pyogrio = pytest.importorskip("pyogrio")
from pyogrio import raw  # noqa: E402

MAPS = Path(__file__).resolve().parent.parent / "maps"
DEMOS = ("ground-yard", "drone-range")


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def gdal_copy(src, target, driver, layer_options=None, layer=None, append=False):
    """``src`` read by GDAL and written again by GDAL's ``driver``, as a GIS editor saves a layer."""
    meta, _, geometry, fields = raw.read(str(src))
    raw.write(str(target), geometry, fields, fields=meta["fields"], crs=meta["crs"],
              geometry_type=meta["geometry_type"], driver=driver, layer_options=layer_options, layer=layer,
              append=append)
    return target


def grid_of(site, cell_m):
    return rasterise(site, GridSpec(cell_m))


@pytest.fixture(scope="module")
def demo_grids():
    out = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for name in DEMOS:
            site = load_site(MAPS / f"{name}.geojson")
            cell = default_cell_m(site)
            out[name] = (cell, grid_of(site, cell))
    return out


@pytest.mark.parametrize("demo", DEMOS)
@pytest.mark.parametrize(("driver", "suffix", "options"), [
    ("GeoJSON", ".geojson", None),               # GDAL's default: a legacy 'crs' member naming CRS84
    ("GeoJSON", ".geojson", {"RFC7946": "YES"}),  # every column on every feature, null where it does not apply
    ("GPKG", ".gpkg", None),                     # what GIS editors save in by default
], ids=["geojson-default", "geojson-rfc7946", "geopackage"])
def test_a_demo_site_saved_by_gdal_gives_the_same_grid(demo_grids, tmp_path, demo, driver, suffix, options):
    target = gdal_copy(MAPS / f"{demo}.geojson", tmp_path / f"{demo}{suffix}", driver, options)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        site = load_sites(target)
    cell, original = demo_grids[demo]
    grid = grid_of(site, cell)
    assert grid.shape == original.shape and grid.n_cells == original.n_cells
    assert int(grid.passable().sum()) == int(original.passable().sum())
    assert np.array_equal(grid.label, original.label) and np.array_equal(grid.goal, original.goal)
    assert [h.name for h in grid.hazards] == [h.name for h in original.hazards]
    if options is None and driver == "GeoJSON":
        assert "crs" in json.loads(target.read_text())
        assert any("WGS 84 lon/lat" in n for n in site.notes)
    if options:
        # GDAL writes every column on every feature; the boundary carries null buffer_m
        first = json.loads(target.read_text())["features"][0]["properties"]
        assert first["role"] == "boundary" and "buffer_m" in first and first["buffer_m"] is None


def test_check_reads_a_geopackage_and_says_nothing_needs_fixing(tmp_path):
    target = gdal_copy(MAPS / "ground-yard.geojson", tmp_path / "yard.gpkg", "GPKG")
    result = run("check", target, "--json")
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    # 96 x 62 cells at 4.5 m: the demo yard's grid (README, speed table)
    assert summary["grid"]["cells"] == 5952


def _layer_per_role(tmp_path, site_dict):
    """The site as a GeoPackage with one layer per role and only that role's columns."""
    path = tmp_path / "per-role.gpkg"
    by_role = {}
    for f in site_dict["features"]:
        by_role.setdefault(f["properties"]["role"], []).append(f)
    append = False
    for role, feats in by_role.items():
        src = tmp_path / f"{role}.geojson"
        src.write_text(json.dumps({"type": "FeatureCollection", "features": [
            {**f, "properties": {k: v for k, v in f["properties"].items() if k != "role"}} for f in feats]}))
        gdal_copy(src, path, "GPKG", layer=role, append=append)
        append = True
    return path


def test_a_geopackage_with_one_layer_per_role(tmp_path, site_dict):
    path = _layer_per_role(tmp_path, site_dict)
    assert {str(name) for name, _ in pyogrio.list_layers(path)} == {"boundary", "start", "goal", "hazard", "drift",
                                                                     "rough"}
    original = grid_of(_memory_site(site_dict), 2.0)
    site = load_sites(path)
    grid = grid_of(site, 2.0)
    assert np.array_equal(grid.label, original.label) and np.array_equal(grid.goal, original.goal)
    assert {z.name for z in site.zones} == {"Pond", "Gust lane", "Gravel"}


def _memory_site(site_dict):
    from planner.site import site_from_geojson

    return site_from_geojson(copy.deepcopy(site_dict))


def _split(tmp_path, site_dict):
    """Boundary, start and goal in a GeoPackage; the zones in a GeoJSON file."""
    outline = dict(site_dict, features=site_dict["features"][:3])
    zones = dict(site_dict, features=site_dict["features"][3:])
    (tmp_path / "outline.geojson").write_text(json.dumps(outline))
    gpkg = gdal_copy(tmp_path / "outline.geojson", tmp_path / "outline.gpkg", "GPKG")
    (tmp_path / "zones.geojson").write_text(json.dumps(zones))
    return gpkg, tmp_path / "zones.geojson"


def test_several_site_files_are_merged_and_each_is_hashed(tmp_path, site_dict):
    import hashlib

    gpkg, zones = _split(tmp_path, site_dict)
    site = load_sites([gpkg, zones])
    assert np.array_equal(grid_of(site, 2.0).label, grid_of(_memory_site(site_dict), 2.0).label)
    assert [p for p, _ in site.inputs] == [str(gpkg), str(zones)]
    assert [d for _, d in site.inputs] == [hashlib.sha256(p.read_bytes()).hexdigest() for p in (gpkg, zones)]
    # the merged copy is plain GeoJSON that gives the same site again
    assert hashlib.sha256(site.data).hexdigest() == site.sha256
    again = load_site(_write(tmp_path / "merged.geojson", site.data))
    assert np.array_equal(grid_of(again, 2.0).label, grid_of(site, 2.0).label)


def _write(path, data: bytes):
    path.write_bytes(data)
    return path


def test_an_error_in_a_merged_file_names_the_file_and_its_feature(tmp_path, site_dict):
    gpkg, zones = _split(tmp_path, site_dict)
    bad = json.loads(zones.read_text())
    bad["features"][1]["properties"]["depth_m"] = 3.0
    zones.write_text(json.dumps(bad))
    with pytest.raises(SiteError, match=rf"^{zones}: feature 1 \('Gust lane'\): unknown property 'depth_m'"):
        load_sites([gpkg, zones])
    result = run("check", gpkg, zones)
    assert result.exit_code == 2 and result.stderr.count("\n") == 1
    assert f"{zones}: feature 1 ('Gust lane')" in result.stderr
    # two boundaries across files: both named with their file
    zones.write_text(json.dumps(dict(site_dict, features=site_dict["features"][3:])))
    (tmp_path / "again.geojson").write_text(json.dumps(dict(site_dict, features=site_dict["features"][:1])))
    with pytest.raises(SiteError, match=r"2 features with role 'boundary' \(.*outline.gpkg: feature 0 \('Test yard'\) "
                                        r"and .*again.geojson: feature 0 \('Test yard'\)\)"):
        load_sites([gpkg, tmp_path / "again.geojson", zones])


def test_a_layer_named_for_a_role_refuses_a_feature_of_another_role(tmp_path, site_dict):
    src = tmp_path / "hazard.geojson"
    src.write_text(json.dumps(dict(site_dict, features=[site_dict["features"][3], site_dict["features"][5]])))
    gdal_copy(src, tmp_path / "mixed.gpkg", "GPKG", layer="hazard")
    with pytest.raises(SiteError, match=r"layer named for role 'hazard'"):
        load_sites(tmp_path / "mixed.gpkg")


def test_without_the_gis_extra_a_geopackage_gets_one_line_naming_it(tmp_path, monkeypatch):
    target = gdal_copy(MAPS / "ground-yard.geojson", tmp_path / "yard.gpkg", "GPKG")
    monkeypatch.setitem(sys.modules, "pyogrio", None)  # import pyogrio now fails
    result = run("check", target)
    assert result.exit_code == 2
    assert result.stderr == (f"veerwise: error: {target}: reading a GeoPackage needs the optional GIS extra: "
                             "pip install 'veerwise[gis]'\n")


def test_a_file_gdal_cannot_read_is_one_line(tmp_path):
    bad = tmp_path / "yard.gpkg"
    bad.write_bytes(b"\x00\x01not a geopackage at all")
    result = run("check", bad)
    assert result.exit_code == 2 and result.stderr.count("\n") == 1
    assert "not a vector format GDAL reads" in result.stderr


def test_merged_text_keeps_every_digit(tmp_path):
    x = 9.123456789012345
    text = merged_text([{"type": "Feature", "properties": {}, "geometry": {"type": "Point", "coordinates": [x, 1.0]}}])
    assert json.loads(text)["features"][0]["geometry"]["coordinates"][0] == x


def test_the_same_file_twice_is_refused(site_file):
    result = run("check", site_file, site_file)
    assert result.exit_code == 2 and "given twice" in result.stderr


def test_plan_on_merged_files_keeps_the_merged_copy_and_hashes_every_input(tmp_path):
    import hashlib

    from test_cli_plan import SMALL

    gpkg, zones = _split(tmp_path, small_site_dict())
    out = tmp_path / "run"
    result = run("plan", gpkg, zones, out, *SMALL)
    assert result.exit_code == 0, result.output
    manifest = json.loads((out / "manifest.json").read_text())
    files = manifest["input"]["files"]
    assert [f["path"] for f in files] == [str(gpkg), str(zones)]
    assert [f["sha256"] for f in files] == [hashlib.sha256(p.read_bytes()).hexdigest() for p in (gpkg, zones)]
    copy_bytes = (out / "site.geojson").read_bytes()
    assert manifest["input"]["sha256"] == hashlib.sha256(copy_bytes).hexdigest()
    assert manifest["input"]["site"] == f"{gpkg} + {zones}"
    assert json.loads(copy_bytes)["type"] == "FeatureCollection"
    # the commands that read the run rebuild the same site from the copy
    again = run("risk", out, "--format", "json", "--rollouts", "0", "--table-noises", "0.1", "--table-drifts", "1")
    assert again.exit_code == 0, again.output


# ----------------------------------------------------------------------------- outputs read by outside readers


@pytest.fixture(scope="module")
def planned_run(tmp_path_factory):
    """A small plan's run folder (the shared settings of test_cli_plan)."""
    from conftest import plan_small_site
    from test_cli_plan import SMALL

    _, out, result = plan_small_site(tmp_path_factory.mktemp("plan"), *SMALL)
    assert result.exit_code == 0, result.output
    return out


def _product_waypoints(run_folder, policy):
    """(lon, lat) of a route's waypoints as the product's own GeoJSON has them."""
    from planner.export import read_waypoints_geojson

    return np.array(read_waypoints_geojson(run_folder / f"routes-{policy}.geojson"))


def test_waypoint_csv_is_read_by_pandas_with_default_arguments(planned_run):
    pandas = pytest.importorskip("pandas")
    frame = pandas.read_csv(planned_run / "waypoints-cautious.csv")
    assert list(frame.columns[:6]) == ["policy", "seq", "east_m", "north_m", "lon", "lat"]
    assert list(frame["seq"]) == list(range(len(frame)))
    assert (frame["use"].str.startswith("simulation only")).all()
    np.testing.assert_allclose(frame[["lon", "lat"]].to_numpy(), _product_waypoints(planned_run, "cautious"),
                               rtol=0, atol=1e-9)


def test_waypoint_csv_is_read_by_gdals_csv_driver_with_lon_lat_as_points(planned_run):
    import shapely

    meta, _, geometry, fields = raw.read(str(planned_run / "waypoints-shortest.csv"), X_POSSIBLE_NAMES="lon",
                                         Y_POSSIBLE_NAMES="lat")
    # the header is the first line: GDAL's columns are ours, not a comment line
    assert list(meta["fields"][:3]) == ["policy", "seq", "east_m"]
    xy = shapely.get_coordinates(shapely.from_wkb(geometry))
    np.testing.assert_allclose(xy, _product_waypoints(planned_run, "shortest"), rtol=0, atol=1e-9)


def test_routes_geojson_is_read_by_gdal(planned_run):
    import shapely

    layers = pyogrio.list_layers(planned_run / "routes-cautious.geojson")
    assert len(layers) == 1
    meta, _, geometry, fields = raw.read(str(planned_run / "routes-cautious.geojson"))
    kinds = list(fields[list(meta["fields"]).index("kind")])
    assert kinds[0] == "route" and set(kinds[1:]) == {"waypoint"}
    points = shapely.get_coordinates(shapely.from_wkb(geometry[1:]))
    np.testing.assert_allclose(points, _product_waypoints(planned_run, "cautious"), rtol=0, atol=1e-9)
    assert "EPSG:4326" in meta["crs"] or "CRS84" in meta["crs"]


def _export(run_folder, target, *args):
    result = run("export", run_folder, "-o", target, *args)
    assert result.exit_code == 0, result.output
    return result


def test_gpx_is_read_by_gpxpy_and_gdal_without_ele_when_no_ground_elevation(planned_run, tmp_path):
    gpxpy = pytest.importorskip("gpxpy")
    target = tmp_path / "routes.gpx"
    result = _export(planned_run, target, "--alt-m", "30")
    assert "no <ele>" in result.stderr
    gpx = gpxpy.parse(target.read_text())
    assert [r.name for r in gpx.routes] == ["cautious", "shortest"]
    for route in gpx.routes:
        assert all(p.elevation is None for p in route.points)
        np.testing.assert_allclose([[p.longitude, p.latitude] for p in route.points],
                                   _product_waypoints(planned_run, route.name), rtol=0, atol=1e-9)
        assert all(p.comment == "30.000 m above ground level" for p in route.points)
    meta, _, _, fields = raw.read(str(target), layer="route_points")
    ele = fields[list(meta["fields"]).index("ele")]
    assert np.isnan(ele).all()
    assert len(ele) == sum(len(r.points) for r in gpx.routes)


def test_gpx_ele_is_ground_elevation_plus_altitude_above_ground(planned_run, tmp_path):
    gpxpy = pytest.importorskip("gpxpy")
    target = tmp_path / "routes.gpx"
    _export(planned_run, target, "--alt-m", "30", "--ground-elev-m", "212", "--vertical-datum", "EPSG:5773")
    gpx = gpxpy.parse(target.read_text())
    # 212 m of ground (EGM96 height, a sea-level height) + 30 m above ground = 242 m
    assert {p.elevation for r in gpx.routes for p in r.points} == {242.0}
    meta, _, _, fields = raw.read(str(target), layer="route_points")
    assert set(fields[list(meta["fields"]).index("ele")]) == {242.0}


def test_geojson_third_coordinate_only_with_an_ellipsoidal_ground(planned_run, tmp_path):
    target = tmp_path / "routes.geojson"
    _export(planned_run, target, "--policy", "cautious", "--alt-m", "30", "--ground-elev-m", "212",
            "--vertical-datum", "ellipsoid")
    obj = json.loads(target.read_text())
    points = [f for f in obj["features"] if f["properties"]["kind"] == "waypoint"]
    assert all(f["geometry"]["coordinates"][2] == 242.0 for f in points)
    assert all(f["properties"]["ground_elevation_m"] == 212.0 and f["properties"]["alt_above_ground_m"] == 30.0
               for f in points)
    meta, _, geometry, _ = raw.read(str(target))
    import shapely

    assert set(shapely.get_coordinates(shapely.from_wkb(geometry[1:]), include_z=True)[:, 2]) == {242.0}


def test_csv_height_columns_with_a_ground_elevation(planned_run, tmp_path):
    pandas = pytest.importorskip("pandas")
    target = tmp_path / "wp.csv"
    _export(planned_run, target, "--policy", "shortest", "--alt-m", "30", "--ground-elev-m", "212",
            "--vertical-datum", "EPSG:5773")
    frame = pandas.read_csv(target)
    assert (frame["alt_above_ground_m"] == 30.0).all() and (frame["ground_elevation_m"] == 212.0).all()
    assert (frame["elevation_m"] == 242.0).all() and (frame["vertical_datum"] == "EGM96 height (EPSG:5773)").all()
    assert (tmp_path / "wp.txt").is_file()


def test_a_dem_geotiff_gives_the_ground_elevation(planned_run, tmp_path):
    gpxpy = pytest.importorskip("gpxpy")
    rasterio = pytest.importorskip("rasterio")
    from rasterio.transform import from_origin

    lon, lat = _product_waypoints(planned_run, "cautious").T
    dem = tmp_path / "dem.tif"
    # a ground rising 1 m per 0.0001 degree east, on 0.00005-degree pixels
    west, north, step = lon.min() - 0.001, lat.max() + 0.001, 0.00005
    width, height = int((lon.max() - west + 0.001) / step) + 1, int((north - lat.min() + 0.001) / step) + 1
    values = 200.0 + np.tile(np.arange(width) * 0.5, (height, 1))
    with rasterio.open(dem, "w", driver="GTiff", width=width, height=height, count=1, dtype="float64",
                       crs="EPSG:4326", transform=from_origin(west, north, step, step)) as out:
        out.write(values, 1)
    target = tmp_path / "routes.gpx"
    _export(planned_run, target, "--policy", "cautious", "--alt-m", "30", "--dem", dem, "--vertical-datum",
            "EPSG:3855")
    ele = [p.elevation for r in gpxpy.parse(target.read_text()).routes for p in r.points]
    # the pixel containing each waypoint: its column from the west edge, independently
    expected = 200.0 + np.floor((lon - west) / step) * 0.5 + 30.0
    np.testing.assert_allclose(ele, expected, rtol=0, atol=5e-4)


@pytest.fixture(scope="module")
def geotiff(planned_run, tmp_path_factory):
    pytest.importorskip("rasterio")
    target = tmp_path_factory.mktemp("tif") / "riskmap.tif"
    _export(planned_run, target)
    return target


def test_the_geotiff_holds_the_products_own_risk_maps_in_the_manifest_frame(planned_run, geotiff):
    import rasterio
    from pyproj import CRS

    from planner.gridfiles import label_codes
    from planner.model import epsilon_greedy
    from planner.risk import risk_map
    from planner.runload import load_run, rebuild

    manifest = json.loads((planned_run / "manifest.json").read_text())
    loaded = load_run(planned_run)
    _, grid, model = rebuild(loaded)
    with rasterio.open(geotiff) as ds:
        assert CRS.from_wkt(ds.crs.to_wkt()).equals(CRS.from_user_input(manifest["grid"]["crs"]))
        assert (ds.height, ds.width) == (manifest["grid"]["rows"], manifest["grid"]["cols"])
        assert ds.count == 3 and np.isnan(ds.nodata)
        noise = manifest["settings"]["learn"]["epsilon"]
        assert ds.descriptions[0].startswith(f"P(incident) from each cell, cautious route, noise {noise:g}")
        assert ds.descriptions[1].startswith("P(incident) from each cell, shortest route")
        data = ds.read()
    for band, name in enumerate(("cautious", "shortest")):
        own = risk_map(model, epsilon_greedy(loaded.arrays[f"greedy_{name}"], model.n_actions, noise))
        own = own.reshape(grid.shape)
        # raster row i is grid row (n_rows - 1 - i): GeoTIFF's first row is the northern one
        np.testing.assert_array_equal(data[band], own[::-1])
    np.testing.assert_array_equal(data[2], label_codes(grid)[::-1])


def test_a_cell_centre_in_the_geotiff_lies_at_the_products_own_lon_lat(planned_run, geotiff):
    import pandas
    import rasterio
    from pyproj import Transformer

    frame = pandas.read_csv(planned_run / "waypoints-cautious.csv")
    with rasterio.open(geotiff) as ds:
        to_lonlat = Transformer.from_crs(ds.crs.to_wkt(), "EPSG:4326", always_xy=True)
        for _, w in frame.iterrows():
            row, col = ds.index(w["east_m"], w["north_m"])
            x, y = ds.xy(row, col)  # the pixel centre, from the GeoTIFF's own transform
            # waypoints lie on cell centres; the CSV prints metres to 1 mm
            np.testing.assert_allclose([x, y], [w["east_m"], w["north_m"]], rtol=0, atol=6e-4)
            lon, lat = to_lonlat.transform(x, y)
            # 1e-8 degree is about 1 mm: the mm rounding of east/north and 9-decimal lon/lat
            np.testing.assert_allclose([lon, lat], [w["lon"], w["lat"]], rtol=0, atol=1e-8)


def test_hazard_cells_are_geojson_polygons_gdal_reads(planned_run, tmp_path):
    import shapely

    from planner.runload import load_run, rebuild_grid

    target = tmp_path / "cells.geojson"
    _export(planned_run, target, "--contents", "hazard-cells")
    meta, _, geometry, fields = raw.read(str(target))
    _, grid = rebuild_grid(load_run(planned_run))
    assert len(geometry) == int((grid.label >= 0).sum())
    cells = shapely.from_wkb(geometry)
    assert set(shapely.get_type_id(cells)) == {3}  # Polygon
    assert set(fields[list(meta["fields"]).index("hazard")]) == {h.name for h in grid.hazards}
    # each square is one cell: 2 m x 2 m = 4 m2 on the ground (geodesic area, PROJ's geod)
    from pyproj import Geod

    area, _ = Geod(ellps="WGS84").geometry_area_perimeter(cells[0])
    assert abs(area) == pytest.approx(4.0, rel=1e-4)


@pytest.mark.parametrize(("args", "message"), [
    (["-o", "{tmp}/x.tif", "--contents", "hazard-cells"], "--contents"),
    (["-o", "{tmp}/x.gpx", "--ground-elev-m", "212"], "--vertical-datum is needed with a ground elevation"),
    (["-o", "{tmp}/x.gpx", "--vertical-datum", "EPSG:5773"], "needs --ground-elev-m or --dem"),
    (["-o", "{tmp}/x.gpx", "--ground-elev-m", "212", "--vertical-datum", "EPSG:4326"], "not a vertical datum"),
    (["-o", "{tmp}/x.gpx", "--ground-elev-m", "212", "--vertical-datum", "nowhere"], "not a vertical CRS"),
    (["-o", "{tmp}/x.gpx", "--dem", "{tmp}/none.tif", "--vertical-datum", "EPSG:5773"], "--dem"),
    (["-o", "{tmp}/x.tif", "--ground-elev-m", "212", "--vertical-datum", "EPSG:5773"], "waypoint files only"),
], ids=["cells-as-tif", "no-datum", "datum-alone", "horizontal-datum", "unknown-datum", "missing-dem",
        "heights-on-a-tif"])
def test_bad_export_options_are_one_line_exit_2_nothing_written(planned_run, tmp_path, args, message):
    out = tmp_path / "out"
    out.mkdir()
    result = run("export", planned_run, *[a.replace("{tmp}", str(out)) for a in args])
    assert result.exit_code == 2, result.output
    assert result.stderr.count("\n") == 1 and message in result.stderr
    assert list(out.iterdir()) == []


def test_without_the_gis_extra_a_geotiff_gets_one_line_naming_it(planned_run, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "rasterio", None)
    result = run("export", planned_run, "-o", tmp_path / "x.tif")
    assert result.exit_code == 2
    assert "needs the optional GIS extra: pip install 'veerwise[gis]'" in result.stderr
    assert result.stderr.count("\n") == 1 and not (tmp_path / "x.tif").exists()


# ----------------------------------------------------------------------------- the site template


def test_the_geojson_template_has_every_column_typed_and_an_example_per_role(tmp_path):
    target = tmp_path / "template.geojson"
    result = run("site-template", "-o", target)
    assert result.exit_code == 0, result.output
    obj = json.loads(target.read_text())
    from planner.site import ROLES

    assert {f["properties"]["role"] for f in obj["features"]} == set(ROLES)
    columns = {tuple(f["properties"]) for f in obj["features"]}
    assert len(columns) == 1  # every feature carries every column, as a table does
    info = pyogrio.read_info(target)
    types = dict(zip(info["fields"], info["dtypes"], strict=True))
    # GDAL types each column from its values: the booleans and numbers are not text
    assert types["ends_run"] == "bool" and types["name"] == "object"
    assert all(types[c] == "float64" for c in ("penalty_m", "buffer_m", "cost_factor", "toward_deg", "from_deg",
                                                "drift_per_m", "spread_per_sqrt_m", "chance"))
    check = run("check", target, "--json")
    assert check.exit_code == 0, check.output
    assert json.loads(check.stdout)["warnings"] == []


def test_the_geopackage_template_has_one_typed_layer_per_role(tmp_path):
    target = tmp_path / "template.gpkg"
    assert run("site-template", "-o", target).exit_code == 0
    from planner.gis import ROLE_COLUMNS

    layers = {str(name) for name, _ in pyogrio.list_layers(target)}
    assert layers == set(ROLE_COLUMNS)
    for role, columns in ROLE_COLUMNS.items():
        info = pyogrio.read_info(target, layer=role)
        assert tuple(info["fields"]) == columns and info["features"] == 1
        types = dict(zip(info["fields"], info["dtypes"], strict=True))
        assert all(t == ("object" if c == "name" else "bool" if c == "ends_run" else "float64")
                   for c, t in types.items())
    again = run("site-template", "-o", target)
    assert again.exit_code == 2 and "already exists" in again.stderr


def test_the_round_trip_in_four_steps(tmp_path):
    """README, "The site file": template, draw in a GIS editor (GDAL here), check, plan."""
    import shapely

    target = tmp_path / "my-yard.gpkg"
    assert run("site-template", "-o", target).exit_code == 0             # 1. write the template
    meta, _, geometry, fields = raw.read(str(target), layer="hazard")     # 2. draw: a second hazard
    pond = shapely.from_wkb(geometry[0])
    mast = shapely.affinity.translate(pond, xoff=0.0, yoff=0.00035)      # about 39 m north
    raw.write(str(target), np.array([shapely.to_wkb(mast)], dtype=object),
              [np.array(["Mast"], dtype=object), np.array([True]), np.array([np.nan]), np.array([np.nan])],
              fields=list(meta["fields"]), layer="hazard", driver="GPKG", geometry_type=meta["geometry_type"],
              crs=meta["crs"], append=True)
    result = run("check", target, "--json")                              # 3. check
    assert result.exit_code == 0, result.output
    hazards = json.loads(result.stdout)["zones"]["hazard"]
    assert [h["name"] for h in hazards] == ["Example pond", "Mast"]
    # the null penalty and buffer of the new hazard are absent: default buffer 0
    assert hazards[1]["buffer_m"] == 0 and hazards[1]["ends_run"] is True
    # 4. plan: `veerwise plan my-yard.gpkg RUN` (a plan on a GeoPackage runs in
    # test_plan_on_merged_files_keeps_the_merged_copy_and_hashes_every_input)


def test_without_the_gis_extra_a_geopackage_template_gets_one_line(tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "pyogrio", None)
    result = run("site-template", "-o", tmp_path / "t.gpkg")
    assert result.exit_code == 2 and result.stderr.count("\n") == 1
    assert "pip install 'veerwise[gis]'" in result.stderr and not (tmp_path / "t.gpkg").exists()


def test_a_demo_site_saved_as_a_shapefile_gives_the_same_grid(demo_grids, tmp_path):
    # dBase keeps 10 characters of a column name: 'spread_per_sqrt_m' comes back as 'spread_per'
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        import shapely

        meta, _, geometry, fields = raw.read(str(MAPS / "drone-range.geojson"))
        kinds = shapely.get_type_id(shapely.from_wkb(geometry))
        # a Shapefile holds one geometry type: points and areas go in two files
        for suffix, keep in (("areas", kinds != 0), ("points", kinds == 0)):
            raw.write(str(tmp_path / f"{suffix}.shp"), geometry[keep], [f[keep] for f in fields],
                      fields=meta["fields"], crs=meta["crs"], driver="ESRI Shapefile",
                      geometry_type="Polygon" if suffix == "areas" else "Point")
        assert "spread_per" in list(pyogrio.read_info(tmp_path / "areas.shp")["fields"])
        site = load_sites([tmp_path / "areas.shp", tmp_path / "points.shp"])
    cell, original = demo_grids["drone-range"]
    grid = grid_of(site, cell)
    assert np.array_equal(grid.label, original.label) and np.array_equal(grid.goal, original.goal)
    # the sidecars (.shx, .dbf, .prj, .cpg) are inputs too, each hashed
    assert {Path(p).suffix for p, _ in site.inputs} >= {".shp", ".shx", ".dbf", ".prj"}


def _three_d_multi(data):
    """Every position with a third coordinate, every zone polygon as a one-part MultiPolygon."""
    def lift(node):
        if node and isinstance(node[0], (int, float)):
            return [node[0], node[1], 212.0]
        return [lift(n) for n in node]

    for f in data["features"]:
        geom = f["geometry"]
        geom["coordinates"] = lift(geom["coordinates"])
        if geom["type"] == "Polygon":
            geom["type"], geom["coordinates"] = "MultiPolygon", [geom["coordinates"]]
    return data


@pytest.mark.parametrize("demo", DEMOS)
def test_z_coordinates_and_multipolygons_give_the_same_grid(demo_grids, tmp_path, demo):
    data = _three_d_multi(json.loads((MAPS / f"{demo}.geojson").read_text()))
    target = tmp_path / "z.geojson"
    target.write_text(json.dumps(data))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        site = load_sites(target)
    cell, original = demo_grids[demo]
    grid = grid_of(site, cell)
    assert np.array_equal(grid.label, original.label) and np.array_equal(grid.goal, original.goal)


def test_check_says_in_one_line_that_a_projected_file_was_reprojected(tmp_path):
    data = to_projected(small_site_dict(), "EPSG:32632")
    path = tmp_path / "utm.geojson"
    path.write_text(json.dumps(data))
    result = run("check", path, "--cell", "2")
    assert result.exit_code == 0, result.output
    assert result.stderr == (f"veerwise: note: {path}: positions are in WGS 84 / UTM zone 32N (EPSG:32632) as its "
                             "'crs' member says; reprojected to WGS 84 lon/lat with pyproj\n")
