"""``veerwise check`` and ``veerwise grid`` as a user runs them: output, files, bad input."""

from __future__ import annotations

import copy
import json
import re
from pathlib import Path

import pytest
from click.testing import CliRunner
from conftest import feature, point, rect, small_site_dict
from numpy.testing import assert_allclose

from planner.cli import cli

MAPS = Path(__file__).resolve().parent.parent / "maps"


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def write(tmp_path, obj, name="site.geojson"):
    path = tmp_path / name
    path.write_text(obj if isinstance(obj, str) else json.dumps(obj))
    return path


def test_check_prints_the_summary(tmp_path):
    result = run("check", write(tmp_path, small_site_dict()), "--cell", "2")
    assert result.exit_code == 0, result.output
    out = result.output
    assert "local transverse Mercator" in out
    assert "100 m east-west x 60 m north-south" in out
    # the site centre as lat/lon with hemisphere letters: the fixture's boundary
    # (0..100 m east, 0..60 m north of 47.40 N, 9.25 E) has its centre 50 m east and
    # 30 m north of that origin, i.e. 47.40027 N, 9.25066 E (1 degree of latitude is
    # about 111.2 km, of longitude at 47.4 N about 75.4 km; common practice)
    centre = re.search(r"centre\s+(\d+\.\d{5}) N, (\d+\.\d{5}) E \(WGS 84\)", out)
    assert centre, out
    assert_allclose([float(centre.group(1)), float(centre.group(2))], [47.40 + 30 / 111_200, 9.25 + 50 / 75_400],
                    atol=2e-5)
    assert "Pond (ends run" in out and "buffer 2 m" in out
    assert "Gravel (cost x2)" in out
    assert "Gust lane (toward 180 deg, drift 1.5 m/m, spread 0.707107 m/sqrt(m)" in out
    assert "50 x 30 cells of 2 m = 1,500 cells" in out


def test_check_json_has_the_same_facts(tmp_path):
    result = run("check", write(tmp_path, small_site_dict()), "--cell", "2", "--json")
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    assert data["grid"]["rows"] == 30 and data["grid"]["cols"] == 50
    assert [h["name"] for h in data["zones"]["hazard"]] == ["Pond"]
    assert data["frame"]["largest_scale_distortion"] < 1e-6
    assert data["model"]["estimated_bytes"] > 0


def test_grid_writes_a_png(tmp_path):
    out = tmp_path / "grid.png"
    result = run("grid", write(tmp_path, small_site_dict()), "--cell", "2", "-o", out)
    assert result.exit_code == 0, result.output
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert [p.name for p in tmp_path.iterdir()] == sorted(["site.geojson", "grid.png"]) or out.exists()


@pytest.mark.parametrize("name", ["ground-yard.geojson", "drone-range.geojson"])
def test_demo_sites_check(name):
    result = run("check", MAPS / name)
    assert result.exit_code == 0, result.output
    assert "warnings" in result.output


def _mutate(change):
    site = copy.deepcopy(small_site_dict())
    change(site)
    return site


def _set_prop(index, key, value):
    def change(site):
        site["features"][index]["properties"][key] = value
    return change


BAD_SITES = [
    ("not json", "{not json", "not valid JSON"),
    ("empty", "", "empty"),
    ("not a collection", {"type": "Feature"}, "not a GeoJSON FeatureCollection"),
    ("crs member", _mutate(lambda s: s.update(crs={"type": "name"})), "'crs' member"),
    ("no boundary", _mutate(lambda s: s["features"].pop(0)), "no feature with role 'boundary'"),
    ("two boundaries", _mutate(lambda s: s["features"].append(copy.deepcopy(s["features"][0]))),
     "2 features with role 'boundary'"),
    ("no start", _mutate(lambda s: s["features"].pop(1)), "role 'start'"),
    ("no goal", _mutate(lambda s: s["features"].pop(2)), "role 'goal'"),
    ("unknown role", _mutate(_set_prop(3, "role", "lava")), "feature 3 ('Pond'): unknown role 'lava'"),
    ("unknown property", _mutate(_set_prop(3, "depth_m", 2)), "feature 3 ('Pond'): unknown property 'depth_m'"),
    ("negative buffer", _mutate(_set_prop(3, "buffer_m", -1)), "feature 3 ('Pond'): 'buffer_m' must be >= 0"),
    ("negative penalty", _mutate(_set_prop(3, "penalty_m", -5)), "feature 3 ('Pond'): 'penalty_m' must be >= 0"),
    ("negative drift", _mutate(_set_prop(4, "drift_per_m", -3)), "feature 4 ('Gust lane'): 'drift_per_m' must be >= 0"),
    ("drift per move", _mutate(_set_prop(4, "push_m", 1.5)), "feature 4 ('Gust lane'): property 'push_m' (per move)"),
    ("chance above one", _mutate(_set_prop(4, "chance", 1.5)), "feature 4 ('Gust lane'): 'chance' must be <= 1"),
    ("both directions", _mutate(_set_prop(4, "from_deg", 10)), "both of 'toward_deg'/'from_deg'"),
    ("cost factor below one", _mutate(_set_prop(5, "cost_factor", 0.5)), "'cost_factor' must be >= 1"),
    ("duplicate names", _mutate(_set_prop(5, "name", "Pond")), "zone name 'Pond' is already used"),
    ("wrong geometry", _mutate(lambda s: s["features"][1].update(geometry={"type": "Polygon",
                                                                          "coordinates": rect(1, 1, 2, 2)})),
     "role 'start' needs geometry Point"),
    ("latitude out of range", _mutate(lambda s: s["features"][1]["geometry"].update(coordinates=[9.25, 95.0])),
     "latitude 95.0 is outside"),
    ("start outside", _mutate(lambda s: s["features"][1]["geometry"].update(coordinates=point(150, 30))),
     "start lies outside the boundary"),
    ("goal in hazard", _mutate(lambda s: s["features"][2]["geometry"].update(coordinates=point(50, 30))),
     "goal lies inside hazard feature 3 ('Pond')"),
    ("bow tie", _mutate(lambda s: s["features"][3]["geometry"].update(
        coordinates=[[point(40, 20), point(60, 40), point(60, 20), point(40, 40), point(40, 20)]])),
     "feature 3 ('Pond'): invalid polygon"),
]


@pytest.mark.parametrize("label,content,message", BAD_SITES, ids=[b[0] for b in BAD_SITES])
def test_bad_site_is_one_line_exit_2_nothing_written(tmp_path, label, content, message):
    path = write(tmp_path, content)
    out = tmp_path / "grid.png"
    result = run("grid", path, "--cell", "2", "-o", out)
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1, result.output
    assert lines[0].startswith("veerwise: error: ")
    assert message in lines[0]
    assert "Traceback" not in result.output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site.geojson"]


NAN_SITE = json.dumps(small_site_dict()).replace("9.25", "NaN", 1)


@pytest.mark.parametrize("args,message", [
    (["--cell", "0"], "--cell must be a positive number of metres, got 0.0"),
    (["--cell", "-3"], "--cell must be a positive number of metres, got -3.0"),
    (["--cell", "1e9"], "larger than the site"),
    (["--cell", "0.01"], "over the --max-cells budget"),
    (["--cell", "abc"], "--cell"),
    (["--crs", "EPSG:4326"], "is not a projected CRS"),
    (["--crs", "nonsense"], "not a coordinate reference system"),
])
def test_bad_options_are_one_line(tmp_path, args, message):
    result = run("check", write(tmp_path, small_site_dict()), *args)
    assert result.exit_code == 2
    assert len(result.output.strip().splitlines()) == 1, result.output
    assert message in result.output


def test_nan_coordinate_is_refused(tmp_path):
    result = run("check", write(tmp_path, NAN_SITE))
    assert result.exit_code == 2
    assert "NaN" in result.output


def test_unreachable_goal_is_refused(tmp_path):
    site = small_site_dict()
    site["features"].append(feature("hazard", "Polygon", rect(60, -1, 65, 61), name="Trench"))
    result = run("check", write(tmp_path, site), "--cell", "2")
    assert result.exit_code == 2
    assert "no sequence of moves reaches goal" in result.output


def test_named_projected_crs_is_used(tmp_path):
    result = run("check", write(tmp_path, small_site_dict()), "--cell", "2", "--crs", "EPSG:32632", "--json")
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    assert data["frame"]["kind"] == "named"
    # UTM zone 32 has scale factor 0.9996 on its central meridian (9 deg E): the site
    # at 9.25 deg E sits close to it, so distortion is about 4e-4 (from memory).
    assert 3e-4 < data["frame"]["largest_scale_distortion"] < 5e-4
