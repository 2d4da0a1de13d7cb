"""The scripts in examples/ run as a user runs them (a subprocess, small settings) and
write sane files."""

from __future__ import annotations

import csv
import importlib.util
import io
import json
import math
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
from numpy.testing import assert_allclose
from pyproj import Geod

from planner.exact import optimal_q
from planner.export import GPX_NAMESPACE, SIMULATION_NOTICE
from planner.grid import GridSpec, rasterise
from planner.model import Dynamics, build_model
from planner.risk import evaluate, format_prob
from planner.site import load_site
from planner.ties import equally_good, safest_among

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"
DRONE_RANGE = ROOT / "maps" / "drone-range.geojson"
#: A script gets this long; the small settings below take a few seconds.
TIMEOUT_S = 300
WIND_ARGS = ("--episodes", "3000", "--training-runs", "2", "--cell", "10", "--table-drifts", "1,2", "--noise", "0.1",
             "--root-seed", "3")
YARD_CELL_M = 5.0
YARD_ARGS = ("--episodes", "3000", "--training-runs", "2", "--cell", str(YARD_CELL_M), "--root-seed", "3")


def run_script(name: str, *args, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, str(EXAMPLES / name), *map(str, args)], cwd=cwd, capture_output=True,
                          text=True, timeout=TIMEOUT_S)


def parse_prob(text: str) -> float:
    """Inverse of ``planner.risk.format_prob`` (to its printed precision): the percentage."""
    if text.startswith("< 1 in 10^12"):
        return 0.0
    return float(text.split("%")[0].lstrip("<> ")) / 100.0 if "%" in text else float(text)


@pytest.fixture(scope="module")
def wind(tmp_path_factory):
    folder = tmp_path_factory.mktemp("wind")
    result = run_script("wind_sensitivity.py", "--site", DRONE_RANGE, "-o", folder / "wind.png", *WIND_ARGS,
                        cwd=folder)
    assert result.returncode == 0, result.stderr
    return folder, result.stdout


def test_wind_sensitivity_saves_a_chart(wind):
    folder, _ = wind
    data = (folder / "wind.png").read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    # IHDR width and height (W3C, "PNG Specification", 2nd ed., section 11.2.2):
    # the chart is 7.5 x 4.5 inches at the figure resolution, some hundreds of pixels each way
    width, height = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    assert width > 600 and height > 300


def test_wind_sensitivity_table_matches_an_exact_solve(wind):
    _, out = wind
    lines = out.splitlines()
    header = next(k for k, line in enumerate(lines) if line.strip().startswith("drift scale"))
    columns = ["cautious", "shortest", "exact on-policy", "exact optimal"]
    assert re.split(r"\s{2,}", lines[header].strip())[1:] == columns
    rows = {}
    for line in lines[header + 1: header + 3]:
        fields = re.split(r"\s{2,}", line.strip())
        rows[float(fields[0])] = dict(zip(columns, fields[1:], strict=True))
    assert set(rows) == {1.0, 2.0}
    for values in rows.values():
        assert all(0.0 <= parse_prob(v) <= 1.0 for v in values.values())
    assert "for simulation and review only" in out
    assert out.lower().count("converged") >= 2  # both learners' verdicts are printed

    # The exact optimal policy is planned for the forecast wind and then flown in each
    # wind strength; solved here directly, without the pipeline the script uses.
    site = load_site(DRONE_RANGE)
    grid = rasterise(site, GridSpec(10.0))
    model = build_model(grid, Dynamics())
    q = optimal_q(model).q
    # Ties among equally short actions go to the safest at the run's noise (0.1).
    policy = safest_among(model, equally_good(q), 0.1, value=q).greedy
    for scale, values in rows.items():
        row = evaluate(build_model(grid, Dynamics(drift_scale=scale)), policy, noise=0.1, hazards=grid.hazards)
        assert values["exact optimal"] == format_prob(row.p_incident)


def test_wind_sensitivity_refuses_bad_input_in_one_line(tmp_path):
    result = run_script("wind_sensitivity.py", "--table-drifts", "one,two", cwd=tmp_path)
    assert result.returncode == 2
    assert result.stderr.strip().count("\n") == 0 and "--table-drifts" in result.stderr
    result = run_script("wind_sensitivity.py", "--site", tmp_path / "missing.geojson", cwd=tmp_path)
    assert result.returncode == 2 and "missing.geojson" in result.stderr
    assert not (tmp_path / "wind-sensitivity.png").exists()


@pytest.fixture(scope="module")
def yard(tmp_path_factory):
    folder = tmp_path_factory.mktemp("yard")
    result = run_script("site_in_code.py", folder / "out", *YARD_ARGS, cwd=folder)
    assert result.returncode == 0, result.stderr
    return folder / "out", result.stdout


def _example_module(name: str):
    spec = importlib.util.spec_from_file_location(name, EXAMPLES / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _read_csv(path: Path):
    """(the sidecar's lines, the rows): the CSV's first line is its header."""
    sidecar = path.with_suffix(".txt").read_text(encoding="utf-8").splitlines()
    return sidecar, list(csv.DictReader(io.StringIO(path.read_text(encoding="utf-8"))))


def test_site_in_code_writes_every_file(yard):
    out, stdout = yard
    assert sorted(p.name for p in out.iterdir()) == ["routes.geojson", "routes.gpx", "waypoints-cautious.csv",
                                                      "waypoints-cautious.txt", "waypoints-shortest.csv",
                                                      "waypoints-shortest.txt"]
    for path in out.iterdir():
        assert "simulation only" in path.read_text(encoding="utf-8"), path.name
    assert "cautious" in stdout and "shortest" in stdout and "P(incident)" in stdout


def test_site_in_code_routes_run_from_start_to_goal(yard):
    out, _ = yard
    features = {}
    for f in json.loads((out / "routes.geojson").read_text())["features"]:
        if f["geometry"]["type"] == "LineString":
            features[f["properties"]["policy"]] = f["geometry"]["coordinates"]
    assert set(features) == {"cautious", "shortest"}

    yard_module = _example_module("site_in_code")
    start = next(f for f in yard_module.make_yard()["features"] if f["properties"]["role"] == "start")
    goal = next(f for f in yard_module.make_yard()["features"] if f["properties"]["role"] == "goal")
    # the route starts and ends at cell centres: within half a cell diagonal of the
    # points drawn; measured as geodesics on WGS 84 (Karney's algorithm in PROJ's geod)
    geod = Geod(ellps="WGS84")
    reach = YARD_CELL_M * math.sqrt(2) / 2 + 0.01
    for name, line in features.items():
        _, _, d_start = geod.inv(*line[0][:2], *start["geometry"]["coordinates"])
        _, _, d_goal = geod.inv(*line[-1][:2], *goal["geometry"]["coordinates"])
        assert d_start <= reach, (name, d_start)
        assert d_goal <= reach, (name, d_goal)

        comments, rows = _read_csv(out / f"waypoints-{name}.csv")
        assert SIMULATION_NOTICE in comments[0].lower()
        assert [int(r["seq"]) for r in rows] == list(range(len(rows)))
        # both files print lon/lat to 1e-9 degree
        assert_allclose([[float(r["lon"]), float(r["lat"])] for r in rows], [p[:2] for p in line], rtol=0,
                        atol=1e-9)
        # cumulative length is the sum of the legs (each printed to 1 mm), and each leg is
        # the geodesic distance between its waypoints up to the working frame's scale
        # error, k - 1 = x^2 / (2 R^2) < 1e-10 this close to the central meridian
        # (Snyder, "Map Projections - A Working Manual", USGS PP 1395, 1987, eq. 8-11;
        # from memory), plus the 1 mm printing
        legs = [float(r["leg_m"]) for r in rows]
        assert_allclose(float(rows[-1]["cumulative_m"]), sum(legs), rtol=0, atol=1e-3 * len(legs))
        geodesic = [geod.inv(*a[:2], *b[:2])[2] for a, b in zip(line, line[1:], strict=False)]
        assert_allclose(legs[1:], geodesic, rtol=1e-6, atol=1e-3)


def test_site_in_code_gpx_has_both_routes(yard):
    out, _ = yard
    root = ET.parse(out / "routes.gpx").getroot()
    ns = {"g": GPX_NAMESPACE}
    assert root.tag == f"{{{GPX_NAMESPACE}}}gpx" and root.get("version") == "1.1"
    names = [r.findtext("g:name", namespaces=ns) for r in root.findall("g:rte", ns)]
    assert len(names) == 2 and any("cautious" in n for n in names) and any("shortest" in n for n in names)
    for rte in root.findall("g:rte", ns):
        assert len(rte.findall("g:rtept", ns)) >= 2
