"""Shared fixtures: tiny in-memory sites and a seeded random generator."""

from __future__ import annotations

import copy

import numpy as np
import pytest
from pyproj import Transformer

#: Where the in-memory test sites sit (a fictional spot; any land would do).
ORIGIN_LON, ORIGIN_LAT = 9.25, 47.40


def to_lonlat(points_m):
    """East/north metres around the test origin to [lon, lat] lists (local tmerc)."""
    t = Transformer.from_crs(
        f"+proj=tmerc +lat_0={ORIGIN_LAT} +lon_0={ORIGIN_LON} +k=1 +ellps=WGS84 +units=m",
        "EPSG:4326", always_xy=True,
    )
    return [list(t.transform(x, y)) for x, y in points_m]


def rect(x0, y0, x1, y1):
    """A closed counter-clockwise rectangle ring in lon/lat from metres."""
    return [to_lonlat([(x0, y0), (x1, y0), (x1, y1), (x0, y1), (x0, y0)])]


def feature(role, geometry_type, coordinates, **props):
    return {"type": "Feature", "properties": {"role": role, **props},
            "geometry": {"type": geometry_type, "coordinates": coordinates}}


def point(x, y):
    return to_lonlat([(x, y)])[0]


def small_site_dict():
    """A 100 m x 60 m yard: a pond in the middle, a drift zone, gravel, start west, goal east."""
    return {
        "type": "FeatureCollection",
        "features": [
            feature("boundary", "Polygon", rect(0, 0, 100, 60), name="Test yard"),
            feature("start", "Point", point(10, 30), name="Launch"),
            feature("goal", "Point", point(90, 30), name="Target"),
            feature("hazard", "Polygon", rect(40, 20, 60, 40), name="Pond", buffer_m=2.0),
            feature("drift", "Polygon", rect(30, 40, 70, 60), name="Gust lane", toward_deg=180.0,
                    drift_per_m=1.5, spread_per_sqrt_m=0.7071067811865475),  # 1 m over a 2 m move
            feature("rough", "Polygon", rect(70, 0, 100, 15), name="Gravel", cost_factor=2.0),
        ],
    }


@pytest.fixture
def site_dict():
    """A fresh copy of the small test site, safe to mutate."""
    return copy.deepcopy(small_site_dict())


@pytest.fixture
def site_file(tmp_path):
    """The small test site written to ``tmp_path/site.geojson``."""
    import json

    path = tmp_path / "site.geojson"
    path.write_text(json.dumps(small_site_dict()))
    return path


@pytest.fixture
def no_heavy_work(monkeypatch):
    """``plan`` fails loudly (exit 1, not 2) if it builds the model or trains before refusing bad input."""
    import planner.learn
    import planner.model

    def refuse(*args, **kwargs):
        raise AssertionError("plan started heavy work (model or training) before refusing bad input")

    monkeypatch.setattr(planner.model, "build_model", refuse)
    monkeypatch.setattr(planner.learn, "train", refuse)


@pytest.fixture
def rng():
    """A seeded generator: tests never touch the global RNG."""
    return np.random.default_rng(20261202)


def text_map_grid(lines, hazard_name="hole"):
    """A map in the text convention (first line north; S start, G goal, H hazard, F free)
    as a grid (row 0 south), e.g. gymnasium's FrozenLake maps."""
    from planner.grid import FREE, HazardInfo, grid_from_arrays

    n = len(lines)
    label = np.full((n, len(lines[0])), FREE)
    goal = np.zeros(label.shape, dtype=bool)
    start = None
    for i, line in enumerate(lines):
        for c, ch in enumerate(line):
            r = n - 1 - i
            if ch == "H":
                label[r, c] = 0
            elif ch == "G":
                goal[r, c] = True
            elif ch == "S":
                start = (r, c)
    return grid_from_arrays(label, goal=goal, start=start, hazards=(HazardInfo(hazard_name),))


def plan_small_site(root, *args):
    """Run ``veerwise plan`` on the small test site written into ``root``.

    Returns (site path, run folder, CliRunner result).
    """
    import json

    from click.testing import CliRunner

    from planner.cli import cli

    site = root / "site.geojson"
    site.write_text(json.dumps(small_site_dict()))
    out = root / "run"
    result = CliRunner().invoke(cli, ["plan", str(site), str(out), *[str(a) for a in args]])
    return site, out, result


def hazard_free_route():
    """The small test site with its hazards removed, and its cheapest route at 5 m cells
    (drift off): (site, grid, model, route)."""
    from planner.grid import GridSpec, descend, rasterise
    from planner.model import Dynamics, build_model
    from planner.route import build_route, nominal_path
    from planner.site import site_from_geojson

    data = small_site_dict()
    data["features"] = [f for f in data["features"] if f["properties"]["role"] != "hazard"]
    site = site_from_geojson(data)
    grid = rasterise(site, GridSpec(5.0))
    model = build_model(grid, Dynamics(drift_scale=0.0))
    return site, grid, model, build_route("shortest", nominal_path(model, descend(grid)), grid, site, model)


def to_projected(data, crs):
    """A site dict with every position projected into ``crs`` and a legacy ``crs`` member naming it."""
    from pyproj import Transformer

    t = Transformer.from_crs("EPSG:4326", crs, always_xy=True)

    def walk(node):
        if node and isinstance(node[0], (int, float)):
            return list(t.transform(node[0], node[1]))
        return [walk(n) for n in node]

    for f in data["features"]:
        f["geometry"]["coordinates"] = walk(f["geometry"]["coordinates"])
    data["crs"] = {"type": "name", "properties": {"name": f"urn:ogc:def:crs:{crs.replace(':', '::')}"}}
    return data
