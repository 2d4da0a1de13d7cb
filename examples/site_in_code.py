"""Build a small test yard in code, plan both routes and export their waypoints.

No site file: the yard is a GeoJSON FeatureCollection built as a Python dict (from
metres around a reference point, turned into lon/lat), so a script can generate
variants of a yard (move the pond, widen the gust lane) and plan each one. The
script runs the stages one by one - site, grid, model, learners, exact references,
risk, routes, files - which is what ``veerwise plan`` does for a file.

    python3 examples/site_in_code.py yard-routes

writes ``routes.geojson`` (both routes, lon/lat), ``waypoints-cautious.csv``,
``waypoints-shortest.csv`` and ``routes.gpx`` into the folder given.

For simulation and review only: not approved for field operation.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
from pyproj import Transformer

from planner.errors import PlannerError
from planner.exact import on_policy_q, optimal_q
from planner.export import write_csv, write_geojson, write_gpx
from planner.grid import GridSpec, rasterise
from planner.learn import LearnSettings, learned_ties, train
from planner.model import build_model
from planner.motion import Dynamics
from planner.risk import evaluate, format_prob
from planner.route import build_route, nominal_path
from planner.site import site_from_geojson
from planner.ties import equally_good, safest_among
from planner.verdict import convergence_report, risk_verdict

#: Where the yard's local metres are anchored (any point on land would do).
ORIGIN_LON, ORIGIN_LAT = 11.58, 48.14


def lonlat(points_m):
    """East/north metres around the origin -> [lon, lat] pairs (local transverse Mercator)."""
    to_wgs84 = Transformer.from_crs(
        f"+proj=tmerc +lat_0={ORIGIN_LAT} +lon_0={ORIGIN_LON} +k=1 +ellps=WGS84 +units=m", "EPSG:4326",
        always_xy=True)
    return [list(to_wgs84.transform(x, y)) for x, y in points_m]


def box(x0, y0, x1, y1):
    """A rectangle as a GeoJSON Polygon's coordinates (one counter-clockwise ring)."""
    return [lonlat([(x0, y0), (x1, y0), (x1, y1), (x0, y1), (x0, y0)])]


def feature(role, name, geometry_type, coordinates, **properties):
    return {"type": "Feature", "properties": {"role": role, "name": name, **properties},
            "geometry": {"type": geometry_type, "coordinates": coordinates}}


def make_yard(pond_width_m: float = 30.0) -> dict:
    """A 120 m x 70 m yard: a pond between start and goal, a gust lane to its north
    that pushes south (toward the pond), a drop edge along the south side, gravel."""
    half = pond_width_m / 2
    return {"type": "FeatureCollection", "features": [
        feature("boundary", "Practice yard", "Polygon", box(0, 0, 120, 70)),
        feature("start", "Launch", "Point", lonlat([(10, 35)])[0]),
        feature("goal", "Target", "Point", lonlat([(110, 35)])[0]),
        feature("hazard", "Pond", "Polygon", box(60 - half, 25, 60 + half, 45), buffer_m=2.0),
        feature("hazard", "Drop edge", "Polygon", box(30, 0, 90, 6)),
        feature("drift", "Gust lane", "Polygon", box(40, 45, 80, 70), from_deg=0.0, drift_per_m=0.4,
                spread_per_sqrt_m=0.45, chance=0.6),
        feature("rough", "Gravel", "Polygon", box(90, 50, 120, 70), cost_factor=1.5),
    ]}


def parse_args(argv=None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("folder", type=Path, nargs="?", default=Path("yard-routes"),
                        help="folder for the waypoint files; default: %(default)s")
    parser.add_argument("--cell", type=float, default=2.5, help="cell size in metres; default: %(default)s")
    parser.add_argument("--move-m", type=float, default=None,
                        help="metres the vehicle travels between heading decisions (>= the cell); default: one cell")
    parser.add_argument("--episodes", type=int, default=30_000, help="training episodes per seed; default: %(default)s")
    parser.add_argument("--training-runs", type=int, default=4, help="independent training runs per learner")
    parser.add_argument("--noise", type=float, default=0.1,
                        help="execution noise the cautious route is planned for; default: %(default)s")
    parser.add_argument("--root-seed", type=int, default=7, help="root seed, for a reproducible run")
    return parser.parse_args(argv)


def main(argv=None) -> int:
    args = parse_args(argv)
    try:
        site = site_from_geojson(make_yard(), source="make_yard()")
        grid = rasterise(site, GridSpec(args.cell))
        model = build_model(grid, Dynamics(slip=0.1, move_m=args.move_m))
        learn = LearnSettings(epsilon=args.noise, episodes=args.episodes, n_seeds=args.training_runs, start_mode="explore")
        # one root seed for the whole script, one child per learner: reruns give identical routes
        seed_cautious, seed_shortest = np.random.SeedSequence(args.root_seed).spawn(2)
        learned = {"cautious": train(model, "sarsa", learn, seed=seed_cautious),
                   "shortest": train(model, "qlearning", learn, seed=seed_shortest)}
        exact = {"cautious": on_policy_q(model, args.noise), "shortest": optimal_q(model)}
        routes = []
        print(f"{site.name}: grid {grid.shape[1]} x {grid.shape[0]} cells of {grid.cell_m:g} m "
              "(for simulation and review only)")
        for name, result in learned.items():
            # Ties by safety: among actions the learned Q cannot tell apart, the safest at the noise.
            greedy = safest_among(model, learned_ties(result), args.noise, value=result.q_mean,
                                  riskiest=False).greedy
            conv = convergence_report(model, result, exact[name], args.noise if name == "cautious" else 0.0,
                                      tie_m=0.25 * grid.cell_m, greedy=greedy)
            reference = safest_among(model, equally_good(exact[name].q), args.noise, value=exact[name].q)
            conv = conv.judged_by(risk_verdict(model, greedy, reference, fmt=format_prob),
                                  advice=f"try --episodes {4 * learn.episodes}")
            risk = evaluate(model, greedy, noise=args.noise, name=name, hazards=grid.hazards)
            route = build_route(name, nominal_path(model, greedy), grid, site, model)
            routes.append(route)
            print(f"  {name:9s} {route.length_m:6.1f} m, {len(route.waypoints)} waypoints, closest approach "
                  f"{route.min_clearance_m:.1f} m to {route.min_clearance_hazard}; P(incident) "
                  f"{format_prob(risk.p_incident)} at noise {args.noise:g}")
            print(f"            {conv.message}")
            if not route.reached_goal:
                print(f"            WARNING: the nominal route ends {route.end_event}, not at the goal")
        args.folder.mkdir(parents=True, exist_ok=True)
        written = [write_geojson(routes, args.folder / "routes.geojson", site=site),
                   *[write_csv(r, args.folder / f"waypoints-{r.name}.csv") for r in routes],
                   write_gpx(routes, args.folder / "routes.gpx", name=site.name)]
    except PlannerError as err:
        print(f"site_in_code: {err}", file=sys.stderr)
        return 2
    print("wrote " + ", ".join(str(p) for p in written))
    return 0


if __name__ == "__main__":
    sys.exit(main())
