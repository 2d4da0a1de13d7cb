"""Routes: the nominal path of a policy, its waypoints and their clearances.

This stage owns the nominal route (follow the greedy action and the most likely
outcome from the start until the goal, an incident, or a repeated cell), its polyline
of cell centres, the simplified waypoints (no leg closer to any hazard than the cells
it replaces, see :func:`simplify_path`) and the clearance of each waypoint to the true
hazard polygons.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import shapely

from planner.errors import SettingsError
from planner.model import EVENT_GOAL, EVENT_NONE, Model


@dataclass(frozen=True)
class NominalPath:
    """The cells of a nominal route and how it ended.

    ``states`` are flat state indices from the start, in order; ``end_event`` is the
    model event code of the final move (``EVENT_GOAL`` for success), or -1 when the
    route returned to a cell it had visited (a loop); ``end_state`` is the cell the
    final move reached (the goal or hazard cell; -1 when it left the boundary).
    """

    states: np.ndarray
    end_event: int
    end_state: int

    @property
    def reached_goal(self) -> bool:
        """Whether the nominal path ends at the goal."""
        return self.end_event == EVENT_GOAL

    @property
    def n_moves(self) -> int:
        """Moves along the nominal path, the ending move included."""
        return int(self.states.size) - 1 + (1 if self.end_event != -1 else 0)


def nominal_path(model: Model, greedy_action: np.ndarray, *, start: int | None = None) -> NominalPath:
    """Follow ``greedy_action`` and each move's most likely outcome.

    Ties between equally likely outcomes go to the first in the table (deterministic).
    """
    state = model.start if start is None else int(start)
    seen = {state}
    states = [state]
    n_a = model.n_actions
    while True:
        k = state * n_a + int(greedy_action[state])
        lo, hi = model.offsets[k], model.offsets[k + 1]
        if hi == lo:
            return NominalPath(np.asarray(states, dtype=np.int64), -1, state)
        best = lo + int(np.argmax(model.prob[lo:hi]))
        event = int(model.event[best])
        if event != EVENT_NONE:
            return NominalPath(np.asarray(states, dtype=np.int64), event, int(model.next_state[best]))
        state = int(model.next_state[best])
        if state in seen:
            return NominalPath(np.asarray(states, dtype=np.int64), -1, state)
        seen.add(state)
        states.append(state)


# ----------------------------------------------------------------------------- routes

#: Slack, in metres, allowed when comparing a shortcut's clearance with the clearance
#: of the cells it replaces. A shortcut along a straight run of cells is the same set of
#: points as the run, but shapely measures it through different segments, so the two
#: distances can differ by floating-point round-off; a micrometre is far above that
#: round-off at site coordinates and far below anything a vehicle could notice.
CLEARANCE_TOLERANCE_M = 1e-6

#: Name of the end event of a nominal path that returned to a visited cell.
LOOP_EVENT = "loop"


@dataclass(frozen=True)
class Waypoint:
    """One waypoint of a route.

    Attributes
    ----------
    seq : position in the route, 0 for the first (the start cell's centre).
    east_m, north_m : position in the working frame, metres.
    lon, lat : the same position in WGS 84 degrees.
    leg_m : length of the leg arriving here, metres (0 for the first waypoint).
    cumulative_m : length of the route from the first waypoint to here, metres.
    clearance_m : distance from this point to the nearest hazard polygon (the true
        polygon, without its buffer), metres; ``inf`` when the site has no hazards.
    nearest_hazard : name of that hazard, or ``None`` when the site has no hazards.
    """

    seq: int
    east_m: float
    north_m: float
    lon: float
    lat: float
    leg_m: float
    cumulative_m: float
    clearance_m: float
    nearest_hazard: str | None


@dataclass(frozen=True)
class Route:
    """The nominal route of one policy, as cells and as simplified waypoints.

    Attributes
    ----------
    name : the policy's name (``"cautious"``, ``"shortest"``, ...).
    reached_goal : whether the nominal path ended in a goal cell.
    end_event : how the nominal path ended: ``"goal"``, ``"boundary"``, a hazard's name,
        or ``"loop"`` when it returned to a cell it had already visited.
    n_moves : moves of the nominal path (its final move included when it ended on an event).
    length_m : length of the cell path polyline, metres.
    path_m : float64 ``(n, 2)``, east/north of the cell centres along the nominal path;
        it ends at the goal cell's centre when the goal was reached. When the path ended
        in a hazard, off the boundary or in a loop, it stops at the last cell before that.
    waypoints : the simplified route (see :func:`simplify_path`), first and last cells kept.
    min_clearance_m : smallest distance from the waypoint polyline to any hazard polygon
        (true polygons), metres; ``inf`` without hazards.
    min_clearance_hazard : name of the hazard at that distance (``None`` without hazards).
    """

    name: str
    reached_goal: bool
    end_event: str
    n_moves: int
    length_m: float
    path_m: np.ndarray
    waypoints: tuple[Waypoint, ...]
    min_clearance_m: float
    min_clearance_hazard: str | None

    @property
    def waypoint_length_m(self) -> float:
        """Length of the simplified route, metres."""
        return self.waypoints[-1].cumulative_m

    def waypoint_xy(self) -> np.ndarray:
        """East/north of the waypoints, float64 ``(n_waypoints, 2)``."""
        return np.array([(w.east_m, w.north_m) for w in self.waypoints], dtype=float).reshape(-1, 2)


def _polyline(points: np.ndarray):
    """A shapely geometry for a polyline: a Point when it has a single vertex."""
    if len(points) == 1:
        return shapely.points(points[0])
    return shapely.linestrings(points)


def simplify_path(points_m, hazards=(), boundary=None, *, tolerance_m: float = CLEARANCE_TOLERANCE_M) -> np.ndarray:
    """Indices of the vertices of ``points_m`` kept as waypoints.

    The rule: the first and last vertices are kept; from each kept vertex ``i`` the next
    kept vertex is the furthest ``j`` for which the straight leg ``i -> j``

    * is, for every hazard separately, at least as far from that hazard as the part of
      the polyline it replaces (vertices ``i`` to ``j``) is, less ``tolerance_m``, and
    * lies wholly inside ``boundary`` (when one is given).

    A leg between neighbouring vertices replaces only itself, so it is always
    acceptable and the walk always advances. Because each leg keeps at least the
    clearance of the stretch it replaces, no leg of the result is closer to any hazard
    than the original polyline was; the same then holds for every buffer of a hazard,
    since the distance to a polygon grown by ``b`` is the distance to the polygon less
    ``b`` (floored at 0).

    Parameters
    ----------
    points_m : float ``(n, 2)``, east/north metres, ``n >= 1``.
    hazards : shapely (Multi)Polygons, in the same frame.
    boundary : shapely (Multi)Polygon a shortcut must stay inside, or ``None``.
    tolerance_m : see :data:`CLEARANCE_TOLERANCE_M`.

    Returns
    -------
    numpy.ndarray
        int64 indices into ``points_m``, increasing, starting at 0 and ending at ``n - 1``.

    Examples
    --------
    >>> import numpy as np
    >>> simplify_path(np.array([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0], [3.0, 1.0]])).tolist()
    [0, 3]
    """
    points = np.asarray(points_m, dtype=float)
    if points.ndim != 2 or points.shape[1] != 2 or len(points) == 0:
        raise SettingsError(f"a path must be an (n, 2) array of east/north metres with n >= 1, got {points.shape}")
    if not np.all(np.isfinite(points)):
        raise SettingsError("a path has coordinates that are not finite")
    n = len(points)
    if n <= 2:
        return np.arange(n, dtype=np.int64)
    hazards = list(hazards)
    segments = shapely.linestrings(np.stack([points[:-1], points[1:]], axis=1))
    # seg_clear[k, h]: distance of segment k (vertices k -> k+1) to hazard h.
    seg_clear = np.column_stack([shapely.distance(segments, h) for h in hazards]) if hazards else None
    if boundary is not None:
        shapely.prepare(boundary)
    kept = [0]
    i = 0
    while i < n - 1:
        targets = np.arange(i + 2, n)
        ok = np.ones(targets.size, dtype=bool)
        if targets.size:
            legs = shapely.linestrings(np.stack([np.repeat(points[i:i + 1], targets.size, axis=0),
                                                 points[targets]], axis=1))
            if seg_clear is not None:
                # Clearance of the stretch i -> j is the running minimum over its segments.
                stretch = np.minimum.accumulate(seg_clear[i:], axis=0)[targets - 1 - i]
                leg_clear = np.column_stack([shapely.distance(legs, h) for h in hazards])
                ok &= np.all(leg_clear >= stretch - tolerance_m, axis=1)
            if boundary is not None:
                ok[ok] = shapely.covers(boundary, legs[ok])
        good = targets[ok]
        i = int(good[-1]) if good.size else i + 1
        kept.append(i)
    return np.asarray(kept, dtype=np.int64)


def _nearest_hazard(geoms, hazards, names) -> tuple[np.ndarray, list[str | None]]:
    """Distance from each geometry to its nearest hazard, and that hazard's name."""
    if not hazards:
        return np.full(len(geoms), np.inf), [None] * len(geoms)
    dist = np.column_stack([shapely.distance(geoms, h) for h in hazards])
    which = np.argmin(dist, axis=1)
    return dist[np.arange(len(geoms)), which], [names[k] for k in which]


def build_route(name: str, path: NominalPath, grid, site, model: Model) -> Route:
    """The route of one policy: cell polyline, simplified waypoints and clearances.

    Parameters
    ----------
    name : the policy's name, carried into every export.
    path : the policy's nominal path (:func:`nominal_path`) on ``model``.
    grid : the :class:`~planner.grid.Grid` the model was built on.
    site : the :class:`~planner.site.Site` the grid was rasterised from; its true hazard
        polygons give the clearances and its frame gives lon/lat.
    model : the :class:`~planner.model.Model`, for the names of the end events.

    Returns
    -------
    Route

    Raises
    ------
    SettingsError
        When the path, grid, model and site do not belong together.
    """
    if tuple(model.shape) != tuple(grid.shape):
        raise SettingsError(f"route {name!r}: model shape {model.shape} differs from grid shape {grid.shape}")
    hazard_zones = site.hazards
    if len(hazard_zones) != len(grid.hazards):
        raise SettingsError(
            f"route {name!r}: site has {len(hazard_zones)} hazards but the grid has {len(grid.hazards)}; "
            "the grid was not rasterised from this site"
        )
    states = np.asarray(path.states, dtype=np.int64)
    if states.ndim != 1 or states.size == 0 or states.min() < 0 or states.max() >= grid.n_cells:
        raise SettingsError(f"route {name!r}: path states must be a non-empty list of cell indices of the grid")
    if path.reached_goal:
        if not 0 <= path.end_state < grid.n_cells:
            raise SettingsError(f"route {name!r}: path reached the goal but its end cell {path.end_state} is not a cell")
        states = np.append(states, path.end_state)
    if path.end_event == -1:
        end_event = LOOP_EVENT
    elif 0 <= path.end_event < len(model.event_names):
        end_event = model.event_names[path.end_event]
    else:
        raise SettingsError(f"route {name!r}: path end event {path.end_event} is not an event of the model")

    east, north = grid.centres()
    rows, cols = np.unravel_index(states, grid.shape)
    points = np.column_stack([east[rows, cols], north[rows, cols]]).astype(float)
    steps = np.hypot(*np.diff(points, axis=0).T) if len(points) > 1 else np.zeros(0)

    polygons = [z.geometry for z in hazard_zones]
    names = [z.name for z in hazard_zones]
    keep = simplify_path(points, polygons, site.boundary)
    way = points[keep]
    legs = np.concatenate([[0.0], np.hypot(*np.diff(way, axis=0).T)]) if len(way) > 1 else np.zeros(1)
    cumulative = np.cumsum(legs)
    lon, lat = site.frame.to_lonlat(way[:, 0], way[:, 1])
    lon, lat = np.atleast_1d(lon), np.atleast_1d(lat)
    clear, nearest = _nearest_hazard(shapely.points(way), polygons, names)
    waypoints = tuple(
        Waypoint(seq=k, east_m=float(way[k, 0]), north_m=float(way[k, 1]), lon=float(lon[k]), lat=float(lat[k]),
                 leg_m=float(legs[k]), cumulative_m=float(cumulative[k]), clearance_m=float(clear[k]),
                 nearest_hazard=nearest[k])
        for k in range(len(way))
    )
    route_clear, route_nearest = _nearest_hazard(np.array([_polyline(way)]), polygons, names)
    points.setflags(write=False)
    return Route(
        name=name, reached_goal=path.reached_goal, end_event=end_event, n_moves=path.n_moves,
        length_m=float(steps.sum()), path_m=points, waypoints=waypoints,
        min_clearance_m=float(route_clear[0]), min_clearance_hazard=route_nearest[0],
    )


def clearance_m(path_xy, hazards) -> dict[str, float]:
    """Clearance of a route to each hazard polygon, in metres (0 where they touch).

    Parameters
    ----------
    path_xy : float ``(n, 2)``, east/north metres of the route's points in order (a
        polyline through cell centres; one point is a point).
    hazards : mapping name -> shapely geometry, or site zones (objects with ``name``
        and ``geometry``, e.g. ``site.hazards``): the true polygons, unbuffered.

    Returns
    -------
    dict
        hazard name -> shortest distance from the route to the polygon, metres.
    """
    import shapely

    xy = np.asarray(path_xy, dtype=float).reshape(-1, 2)
    if xy.shape[0] == 0:
        raise SettingsError("clearance needs a route with at least one point")
    if not np.all(np.isfinite(xy)):
        raise SettingsError("route coordinates must be finite")
    route = shapely.points(xy[0]) if xy.shape[0] == 1 else shapely.linestrings(xy)
    items = hazards.items() if isinstance(hazards, Mapping) else ((z.name, z.geometry) for z in hazards)
    return {str(name): float(shapely.distance(route, geom)) for name, geom in items}
