"""Rasterising: a :class:`~planner.site.Site` becomes a labelled :class:`Grid`.

This stage owns cell geometry (square cells of ``cell_m`` metres, row 0 at the south
edge, column 0 at the west edge), the conservative labelling rules, rough-cell cost
factors, which drift zones act in each cell (what they do to the vehicle is
``planner.motion``'s), and the deterministic shortest-path costs on the cell lattice
(Dijkstra) that later stages use as a heuristic and to size the hazard penalty.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import shapely

from planner import checks
from planner.errors import BudgetError, SettingsError, SiteError
from planner.motion import check_headings

#: Cell label: outside the boundary.
OUTSIDE = -2
#: Cell label: inside the boundary and in no hazard.
FREE = -1
#: Default budget on the number of grid cells.
DEFAULT_MAX_CELLS = 400_000
#: Overlaps thinner than this (metres) are drawing precision, not geometry, at any cell size.
DRAWING_TOLERANCE_M = 0.01
#: ... and overlaps thinner than this share of the cell side: below what the grid resolves.
DRAWING_TOLERANCE_SHARE = 0.02
#: Hazards are tracked in a 64-bit mask per outcome.
MAX_HAZARDS = 62


@dataclass(frozen=True)
class GridSpec:
    """How to rasterise a site.

    Parameters
    ----------
    cell_m : side of a square cell, metres (> 0).
    hazard_overlap : a cell is hazard when a (buffered) hazard covers more than this
        fraction of it; 0 (default) means any overlap at all.
    boundary_cover : a cell is inside when the boundary covers at least this fraction
        of it; 1 (default) means wholly.

    The boundary rule ignores a gap thinner than :func:`drawing_tolerance_m` along a
    cell side (2 % of the side, at least 1 cm): that is drawing precision or the
    frame's curvature, not a drawn edge. The hazard rule ignores only overlaps thinner
    than ``DRAWING_TOLERANCE_M`` (1 cm, coordinate round-off), so a hazard that
    reaches into a cell by more than that still makes it hazard, at any cell size.
    max_cells : refuse grids with more cells than this.
    """

    cell_m: float
    hazard_overlap: float = 0.0
    boundary_cover: float = 1.0
    max_cells: int = DEFAULT_MAX_CELLS

    def __post_init__(self):
        checks.positive_metres(self.cell_m, "GridSpec.cell_m")
        checks.number(self.hazard_overlap, "GridSpec.hazard_overlap", low=0.0, high=1.0, high_open=True)
        checks.number(self.boundary_cover, "GridSpec.boundary_cover", low=0.0, high=1.0, low_open=True)
        checks.whole(self.max_cells, "GridSpec.max_cells", low=1, says="a positive whole number")


@dataclass(frozen=True)
class HazardInfo:
    """What the grid keeps of a hazard zone; its index is its cell label."""

    name: str
    ends_run: bool = True
    penalty_m: float | None = None
    feature: int = -1


@dataclass(frozen=True)
class DriftInfo:
    """A drift zone as a per-cell field: what it does, in physical units (see ``planner.motion``).

    ``ratio`` is the mean displacement in metres per metre of move length, toward grid
    bearing ``toward_deg``; ``spread`` the standard deviation in metres after one metre
    of travel (it grows with the square root of the distance); ``chance`` the
    probability that the zone acts on a move.
    """

    name: str
    ratio: float
    toward_deg: float = 0.0
    spread: float = 0.0
    chance: float = 1.0
    feature: int = -1

    def vector_per_m(self) -> tuple[float, float]:
        """Mean drift as (east, north) metres per metre travelled, when the zone acts."""
        rad = math.radians(self.toward_deg)
        return (self.ratio * math.sin(rad), self.ratio * math.cos(rad))


@dataclass(frozen=True)
class Grid:
    """A labelled grid.

    Arrays are ``(n_rows, n_cols)``; row 0 is the southern row, column 0 the western.
    Cell ``(r, c)`` has its centre at ``(x0 + (c + 0.5) * cell_m, y0 + (r + 0.5) * cell_m)``.

    Attributes
    ----------
    label : int16, ``OUTSIDE`` (-2), ``FREE`` (-1) or the index of a hazard in ``hazards``.
    goal : bool, goal cells.
    cost_factor : float64, >= 1.
    drift_class : int32, index into ``drift_members``; class 0 is "no drift".
    drift_members : for each class, the indices (into ``drifts``) of the zones acting there.
    """

    cell_m: float
    x0: float
    y0: float
    label: np.ndarray
    goal: np.ndarray
    start: tuple[int, int]
    cost_factor: np.ndarray
    drift_class: np.ndarray
    drift_members: tuple[tuple[int, ...], ...]
    hazards: tuple[HazardInfo, ...]
    drifts: tuple[DriftInfo, ...]
    warnings: tuple[str, ...] = field(default=())

    @property
    def shape(self) -> tuple[int, int]:
        """``(n_rows, n_cols)``."""
        return tuple(self.label.shape)

    @property
    def n_cells(self) -> int:
        """Number of cells, inside the boundary or not."""
        return int(self.label.size)

    @property
    def start_index(self) -> int:
        """State index of the start cell."""
        return int(np.ravel_multi_index(self.start, self.shape))

    def centres(self) -> tuple[np.ndarray, np.ndarray]:
        """East and north of every cell centre, each ``(n_rows, n_cols)``."""
        rows, cols = np.indices(self.shape)
        return self.x0 + (cols + 0.5) * self.cell_m, self.y0 + (rows + 0.5) * self.cell_m

    def cell_of(self, x: float, y: float) -> tuple[int, int]:
        """The (row, col) of the cell containing point (x, y) in metres."""
        col = int(math.floor((x - self.x0) / self.cell_m))
        row = int(math.floor((y - self.y0) / self.cell_m))
        return (min(max(row, 0), self.shape[0] - 1), min(max(col, 0), self.shape[1] - 1))

    def passable(self) -> np.ndarray:
        """Cells a vehicle may occupy: inside, and not in a hazard that ends the run."""
        ends = np.array([h.ends_run for h in self.hazards] + [False], dtype=bool)
        lab = self.label
        return (lab != OUTSIDE) & ~((lab >= 0) & ends[np.where(lab >= 0, lab, len(self.hazards))])


# ----------------------------------------------------------------------------- shapes


def grid_shape(site, cell_m: float) -> tuple[int, int]:
    """Rows and columns a grid of ``cell_m`` over the site's boundary needs."""
    width, height = site.extent_m
    if cell_m > max(width, height):
        raise SettingsError(
            f"GridSpec.cell_m {cell_m:g} m is larger than the site ({width:.0f} m x {height:.0f} m)"
        )
    # Drawing precision keeps coordinate round-off from adding a sliver column.
    slack = drawing_tolerance_m(cell_m) / cell_m
    return (max(1, math.ceil(height / cell_m - slack)), max(1, math.ceil(width / cell_m - slack)))


def default_cell_m(site) -> float:
    """A cell size giving about 100 cells along the site's longer side, rounded to 0.5 m.

    That keeps a 200-600 m yard at a few thousand cells: fine enough to resolve
    lanes between hazards, small enough to train to convergence in seconds.
    """
    longest = max(site.extent_m)
    return max(0.5, round(longest / 100.0 * 2.0) / 2.0)


def check_budget(n_cells: int, max_cells: int, cell_m: float) -> None:
    """Refuse a grid over the cell budget, with the numbers to choose a better cell."""
    if n_cells > max_cells:
        raise BudgetError(
            f"GridSpec.cell_m {cell_m:g} m gives {n_cells:,} cells, over the GridSpec.max_cells budget of "
            f"{max_cells:,} (about {format_bytes(estimate_model_bytes(n_cells, 8, 9))} of model); use a larger GridSpec.cell_m"
        )


def format_bytes(n: int) -> str:
    """1.5 GiB, 340 MiB, 12 KiB: the unit that keeps the figure readable."""
    if n >= 2**40:
        return f"{n / 2**40:.3g} TiB"
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if n >= size:
            return f"{n / size:.1f} {unit}"
    return f"{n} B"


def estimate_model_bytes(n_cells: int, n_actions: int, outcomes_per_action: float) -> int:
    """Upper estimate of the transition table's size in bytes (see ``planner.model``)."""
    per_outcome = 4 + 8 + 8 + 2 + 8  # next, prob, reward, event, crossed mask
    return int(n_cells * n_actions * (outcomes_per_action * per_outcome + 8))


# ----------------------------------------------------------------------------- building


def rasterise(site, spec: GridSpec) -> Grid:
    """Label every cell of the site, vectorised over cells with shapely 2.

    Raises
    ------
    BudgetError
        When the grid would exceed ``spec.max_cells``.
    SiteError
        When the start or goal cell is unusable at this cell size.
    """
    n_rows, n_cols = grid_shape(site, spec.cell_m)
    check_budget(n_rows * n_cols, spec.max_cells, spec.cell_m)
    if len(site.hazards) > MAX_HAZARDS:
        raise SiteError(f"{site.source}: {len(site.hazards)} hazard zones; at most {MAX_HAZARDS} are supported")
    cell = spec.cell_m
    x0, y0 = site.boundary.bounds[0], site.boundary.bounds[1]
    rows, cols = np.indices((n_rows, n_cols))
    xmin = (x0 + cols * cell).ravel()
    ymin = (y0 + rows * cell).ravel()
    boxes = shapely.box(xmin, ymin, xmin + cell, ymin + cell)
    centres = shapely.points(xmin + cell / 2, ymin + cell / 2)
    cell_area = cell * cell
    tree = shapely.STRtree(boxes)

    inside = _covered_fraction_at_least(tree, boxes, site.boundary, spec.boundary_cover, cell_area)
    label = np.where(inside, FREE, OUTSIDE).astype(np.int16)

    hazards = site.hazards
    # Ending hazards are painted last so that they win where zones overlap.
    order = sorted(range(len(hazards)), key=lambda i: (hazards[i].ends_run, -i))
    for i in order:
        hit = _overlap_fraction_above(tree, boxes, hazards[i].buffered, spec.hazard_overlap, cell_area)
        label[hit & (label != OUTSIDE)] = i

    cost = np.ones(label.size)
    for zone in site.rough:
        hit = _centres_in(tree, centres, zone.geometry, boxes)
        cost[hit] = np.maximum(cost[hit], zone.cost_factor)

    drifts = site.drifts
    members_bits = np.zeros(label.size, dtype=np.int64)
    for j, zone in enumerate(drifts):
        members_bits[_centres_in(tree, centres, zone.geometry, boxes)] |= np.int64(1) << j
    uniq, drift_class = np.unique(members_bits, return_inverse=True)
    if uniq[0] != 0:
        uniq = np.concatenate([[0], uniq])
        drift_class = drift_class + 1
    members = tuple(tuple(j for j in range(len(drifts)) if (int(b) >> j) & 1) for b in uniq)

    goal = np.zeros(label.size, dtype=bool)
    if site.goal.geom_type == "Point":
        goal_cells = [_cell_index(site.goal.x, site.goal.y, x0, y0, cell, n_rows, n_cols)]
    else:
        goal_cells = list(np.flatnonzero(_centres_in(tree, centres, site.goal, boxes)))
        if not goal_cells:
            p = site.goal.representative_point()
            goal_cells = [_cell_index(p.x, p.y, x0, y0, cell, n_rows, n_cols)]
    goal[goal_cells] = True

    shape = (n_rows, n_cols)
    start = _cell_index(site.start.x, site.start.y, x0, y0, cell, n_rows, n_cols)
    warnings_out = []
    if label[start] >= 0 and hazards[label[start]].ends_run:
        raise SiteError(
            f"{site.source}: start {site.start_name!r} falls in a cell touched by hazard "
            f"{hazards[label[start]].label} at GridSpec.cell_m {cell:g} m; use a smaller GridSpec.cell_m or move "
            "the start"
        )
    if label[start] == OUTSIDE:
        raise SiteError(
            f"{site.source}: start {site.start_name!r} falls in a cell not wholly inside the boundary "
            f"at GridSpec.cell_m {cell:g} m; use a smaller GridSpec.cell_m or move the start inward"
        )
    goal_hazard = [int(label[g]) for g in goal_cells if label[g] >= 0 and hazards[label[g]].ends_run]
    if goal_hazard and len(goal_hazard) == len(goal_cells):
        raise SiteError(
            f"{site.source}: goal {site.goal_name!r} falls in cells touched by hazard "
            f"{hazards[goal_hazard[0]].label} at GridSpec.cell_m {cell:g} m; use a smaller GridSpec.cell_m or move "
            "the goal"
        )
    usable_goal = goal & ~((label >= 0) & np.isin(label, [h for h in range(len(hazards)) if hazards[h].ends_run]))
    if not usable_goal.any():
        raise SiteError(f"{site.source}: goal {site.goal_name!r} has no usable cell at GridSpec.cell_m {cell:g} m")
    goal = usable_goal
    # A goal cell on the boundary edge still counts: the goal point itself is inside.
    label[goal & (label == OUTSIDE)] = FREE

    grid = Grid(
        cell_m=float(cell), x0=float(x0), y0=float(y0), label=label.reshape(shape), goal=goal.reshape(shape),
        start=tuple(int(v) for v in np.unravel_index(start, shape)), cost_factor=cost.reshape(shape),
        drift_class=drift_class.reshape(shape).astype(np.int32), drift_members=members,
        hazards=tuple(HazardInfo(h.name, h.ends_run, h.penalty_m, h.feature) for h in hazards),
        drifts=tuple(DriftInfo(d.name, d.drift_per_m, d.grid_toward_deg, d.spread_per_sqrt_m, d.chance, d.feature)
                     for d in drifts),
        warnings=tuple(warnings_out),
    )
    if not np.isfinite(cost_to_goal(grid, 8)[grid.start_index]):
        raise SiteError(
            f"{site.source}: no sequence of moves reaches goal {site.goal_name!r} from start "
            f"{site.start_name!r} at GridSpec.cell_m {cell:g} m (hazards or the boundary close every way)"
        )
    return grid


def _cell_index(x, y, x0, y0, cell, n_rows, n_cols) -> int:
    col = min(max(int(math.floor((x - x0) / cell)), 0), n_cols - 1)
    row = min(max(int(math.floor((y - y0) / cell)), 0), n_rows - 1)
    return row * n_cols + col


def _candidates(tree, geometry) -> np.ndarray:
    return tree.query(geometry, predicate="intersects")


def _overlap_areas(tree, boxes, geometry) -> np.ndarray:
    """Area of ``geometry`` inside every cell box (0 for boxes it does not reach)."""
    area = np.zeros(len(boxes))
    idx = _candidates(tree, geometry)
    if idx.size:
        area[idx] = shapely.area(shapely.intersection(boxes[idx], geometry))
    return area


def _covered_fraction_at_least(tree, boxes, geometry, threshold, cell_area) -> np.ndarray:
    area = _overlap_areas(tree, boxes, geometry)
    side = math.sqrt(cell_area)
    return (area > 0) & (area >= threshold * cell_area - drawing_tolerance_m(side) * side)


def _overlap_fraction_above(tree, boxes, geometry, threshold, cell_area) -> np.ndarray:
    # Conservative at any cell size: only coordinate round-off is ignored.
    return _overlap_areas(tree, boxes, geometry) > max(threshold * cell_area, DRAWING_TOLERANCE_M * math.sqrt(cell_area))


def drawing_tolerance_m(cell_m: float) -> float:
    """Width of a boundary gap too thin to count: 2 % of the cell side, at least 1 cm.

    Projection round-off moves drawn edges by fractions of a millimetre, and an edge
    drawn straight in lon/lat on a 2 km site lies up to about 0.3 m off the grid's axis
    at its ends (the local frame's meridian convergence). A fixed width dropped whole
    rows and columns of boundary cells on large sites. A strip under 1/50 of the side
    changes a cell's covered area by under 2 %, finer than the grid claims to resolve,
    so the width scales with the cell. (Hazards keep the fixed 1 cm: see GridSpec.)

    >>> round(drawing_tolerance_m(20.0), 3), round(drawing_tolerance_m(0.25), 3)
    (0.4, 0.01)
    """
    return max(DRAWING_TOLERANCE_M, DRAWING_TOLERANCE_SHARE * float(cell_m))



def _centres_in(tree, centres, geometry, boxes) -> np.ndarray:
    out = np.zeros(len(centres), dtype=bool)
    idx = _candidates(tree, geometry)
    if idx.size:
        shapely.prepare(geometry)
        out[idx] = shapely.covers(geometry, centres[idx])
    return out


def grid_from_arrays(
    label,
    *,
    goal,
    start: tuple[int, int],
    cell_m: float = 1.0,
    cost_factor=None,
    hazards: tuple[HazardInfo, ...] = (),
    drifts: tuple[DriftInfo, ...] = (),
    drift_class=None,
    drift_members: tuple[tuple[int, ...], ...] = ((),),
    x0: float = 0.0,
    y0: float = 0.0,
) -> Grid:
    """Build a grid directly from arrays (reference grids in tests, synthetic benchmarks).

    ``label`` uses ``OUTSIDE``/``FREE``/hazard index, row 0 south. ``goal`` is a bool
    array of the same shape. Without ``drift_class`` every cell is class 0 (no drift).
    """
    label = np.asarray(label, dtype=np.int16)
    if label.ndim != 2:
        raise SettingsError(f"label must be 2-D, got shape {label.shape}")
    goal = np.asarray(goal, dtype=bool)
    if goal.shape != label.shape:
        raise SettingsError(f"goal shape {goal.shape} differs from label shape {label.shape}")
    if label.max(initial=-1) >= len(hazards):
        raise SettingsError(f"label uses hazard {label.max()} but only {len(hazards)} hazards are given")
    cost_factor = np.ones(label.shape) if cost_factor is None else np.asarray(cost_factor, dtype=float)
    if drift_class is None:
        drift_class = np.zeros(label.shape, dtype=np.int32)
    drift_class = np.asarray(drift_class, dtype=np.int32)
    if drift_class.max(initial=0) >= len(drift_members):
        raise SettingsError("drift_class refers to a class with no entry in drift_members")
    if not goal.any():
        raise SettingsError("grid has no goal cell")
    if label[start] == OUTSIDE or goal[start]:
        raise SettingsError(f"start {start} is outside or on the goal")
    return Grid(
        cell_m=float(cell_m), x0=float(x0), y0=float(y0), label=label, goal=goal,
        start=(int(start[0]), int(start[1])), cost_factor=cost_factor, drift_class=drift_class,
        drift_members=tuple(tuple(m) for m in drift_members), hazards=tuple(hazards), drifts=tuple(drifts),
    )


# ----------------------------------------------------------------------------- shortest paths


#: (d_row, d_col) of the eight king moves, clockwise from north: the cell lattice the
#: deterministic shortest paths walk (geometry, not the vehicle: see ``planner.motion``).
KING_MOVES = np.array([(1, 0), (1, 1), (0, 1), (-1, 1), (-1, 0), (-1, -1), (0, -1), (1, -1)], dtype=np.int64)
#: (d_row, d_col) of the four rook moves, clockwise from north.
ROOK_MOVES = KING_MOVES[::2].copy()


def lattice_moves(n_headings: int) -> np.ndarray:
    """The cell-lattice moves for shortest paths: rook moves for 4 headings, king moves otherwise."""
    if n_headings == 4:
        return ROOK_MOVES
    check_headings(n_headings)
    return KING_MOVES


def _deterministic_moves(grid: Grid, n_actions: int, hazard_penalty_m, unit_cost: bool):
    """For each action: where it is allowed, its target cell and its cost, all ``(n_rows, n_cols)``.

    Moves go between passable cells (never out of a goal cell); a diagonal move also
    needs both cells it cuts past to be passable, as the swept path counts
    corner-cutting.
    """
    n_rows, n_cols = grid.shape
    ok = grid.passable() | grid.goal
    extra = np.zeros(grid.shape)
    if hazard_penalty_m is not None:
        for h, pen in enumerate(hazard_penalty_m):
            if not grid.hazards[h].ends_run:
                extra[grid.label == h] = pen
    rows, cols = np.indices(grid.shape)
    for dr, dc in lattice_moves(n_actions):
        r1, c1 = rows + dr, cols + dc
        valid = (r1 >= 0) & (r1 < n_rows) & (c1 >= 0) & (c1 < n_cols) & ok & ~grid.goal
        r1c, c1c = np.clip(r1, 0, n_rows - 1), np.clip(c1, 0, n_cols - 1)
        valid &= ok[r1c, c1c]
        if dr and dc:
            valid &= ok[np.clip(rows + dr, 0, n_rows - 1), cols] & ok[rows, np.clip(cols + dc, 0, n_cols - 1)]
        length = 1.0 if unit_cost else math.hypot(dr, dc)
        yield valid, np.ravel_multi_index((r1c, c1c), grid.shape), length * grid.cell_m * grid.cost_factor + \
            extra[r1c, c1c]


def cost_to_goal(grid: Grid, n_actions: int = 8, *, hazard_penalty_m=None, unit_cost: bool = False) -> np.ndarray:
    """Deterministic cheapest cost (metres-equivalent) from each cell to the goal.

    Moves go between passable cells; a diagonal move also needs both cells it cuts
    past to be passable (the swept path counts corner-cutting). Each move costs its
    length times the cost factor of the cell it starts from (``unit_cost``: one cell
    per move), plus ``hazard_penalty_m[h]`` on entering a cell of a non-ending
    hazard ``h``. Returns ``(n_cells,)`` with ``inf`` where the goal is unreachable.
    """
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import dijkstra

    src_all, dst_all, w_all = [], [], []
    here = np.arange(grid.n_cells).reshape(grid.shape)
    for valid, target, cost in _deterministic_moves(grid, n_actions, hazard_penalty_m, unit_cost):
        src_all.append(here[valid])
        dst_all.append(target[valid])
        w_all.append(cost[valid])
    n = grid.n_cells
    src, dst, w = np.concatenate(src_all), np.concatenate(dst_all), np.concatenate(w_all)
    # Reverse the edges so one multi-source run from the goal gives cost-to-goal. Each
    # (cell, action) gives one edge and actions reach distinct cells: no duplicates.
    graph = csr_matrix((np.maximum(w, 1e-12), (dst, src)), shape=(n, n))
    goals = np.flatnonzero(grid.goal.ravel())
    return dijkstra(graph, directed=True, indices=goals, min_only=True)


def descend(grid: Grid, n_actions: int = 8, *, hazard_penalty_m=None, unit_cost: bool = False) -> np.ndarray:
    """The deterministic cheapest-path policy.

    In each cell, the move that goes down :func:`cost_to_goal` fastest (ties to the
    lowest action index; 0 where no move helps).

    Returns int64 ``(n_cells,)`` actions, usable wherever a greedy policy is.
    """
    to_go = cost_to_goal(grid, n_actions, hazard_penalty_m=hazard_penalty_m, unit_cost=unit_cost)
    values = [np.where(valid, cost + to_go[target], np.inf)
              for valid, target, cost in _deterministic_moves(grid, n_actions, hazard_penalty_m, unit_cost)]
    return np.argmin(np.stack(values, axis=-1), axis=-1).ravel().astype(np.int64)
