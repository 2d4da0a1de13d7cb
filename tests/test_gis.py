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
from conftest import small_site_dict

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
