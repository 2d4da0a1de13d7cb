"""The vehicle: headings, move length, execution errors, drift, and their discretisation.

This stage owns everything about how the vehicle moves, in physical units that do not
depend on how finely the site is drawn:

- **Headings** (4, 8 or 16), clockwise from grid north; action ``a`` is heading ``a``.
- **Move length** ``move_m``: how far the vehicle travels between heading decisions.
  The move vector of a heading lies on the square of half-side ``move_m`` around the
  start (north is ``move_m`` north; north-east is ``move_m`` north and ``move_m``
  east; the 16-heading intermediates at 22.5 degrees reach the square's side), so
  that 4 and 8 headings are the lattice moves whenever the cell divides the move.
- **Per-move errors** (one decision = one move of ``move_m``): slip to a neighbouring
  heading, stall (no commanded motion; drift still acts).
- **Drift** per drift zone: a mean displacement of ``ratio`` metres per metre of move
  length, toward a grid bearing, acting on a move with probability ``chance``, and an
  isotropic spread whose standard deviation after ``x`` metres is ``spread * sqrt(x)``.
  Each decision counts ``move_m`` metres of travel, whatever heading is executed.
- **Discretisation**: the landing point (start centre + move vector + drift + spread)
  is continuous; its probability is split among cell centres so that, per axis, the
  mean is exact and the variance is matched (a locally consistent Markov chain
  approximation: Kushner & Dupuis, Numerical Methods for Stochastic Control Problems
  in Continuous Time, 2nd ed., 2001, ch. 5). When the variance is below what a
  fractional mean needs (``f (1 - f)`` cells squared) the two neighbouring centres
  carry the mean and the excess is at most a quarter of a cell squared per move,
  which vanishes as the cell shrinks.

The grid (``planner.grid``) supplies geometry only (cells, labels, the drift zones
acting in each cell); the model (``planner.model``) combines both into the outcome
table.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from planner import checks
from planner.errors import SettingsError

#: Heading counts a vehicle may have.
HEADING_COUNTS = (4, 8, 16)
_TAN_22_5 = math.tan(math.radians(22.5))
#: A move vector within this many cells of a whole number is that whole number.
_WHOLE_CELL_TOLERANCE = 1e-9
#: Points of the spread's discretisation reach this many standard deviations.
SPREAD_REACH_SD = 4.0

# (north, east) of each heading on the unit square, clockwise from north.
_SQUARE_16 = np.array([
    (1.0, 0.0), (1.0, _TAN_22_5), (1.0, 1.0), (_TAN_22_5, 1.0),
    (0.0, 1.0), (-_TAN_22_5, 1.0), (-1.0, 1.0), (-1.0, _TAN_22_5),
    (-1.0, 0.0), (-1.0, -_TAN_22_5), (-1.0, -1.0), (-_TAN_22_5, -1.0),
    (0.0, -1.0), (_TAN_22_5, -1.0), (1.0, -1.0), (1.0, -_TAN_22_5),
])


def heading_vectors(n_headings: int) -> np.ndarray:
    """(north, east) of every heading in move lengths, clockwise from north; ``(n, 2)`` float64.

    Examples
    --------
    >>> heading_vectors(4).tolist()
    [[1.0, 0.0], [0.0, 1.0], [-1.0, 0.0], [0.0, -1.0]]
    """
    check_headings(n_headings)
    return _SQUARE_16[:: 16 // n_headings].copy()


def heading_bearings_deg(n_headings: int) -> np.ndarray:
    """Grid bearing of every heading, degrees clockwise from north."""
    check_headings(n_headings)
    return np.arange(n_headings) * (360.0 / n_headings)


def check_headings(n_headings) -> None:
    """Refuse a heading count other than 4, 8 or 16."""
    checks.one_of(n_headings, "Dynamics.n_actions", HEADING_COUNTS)


def moves_for(n_headings: int) -> np.ndarray:
    """The lattice moves (d_row, d_col) of 4 or 8 headings at cell = move length, int64.

    Row ``a`` is heading ``a``; 16 headings have no whole-cell moves at that cell size.
    """
    if n_headings not in (4, 8):
        check_headings(n_headings)
        raise SettingsError(f"{n_headings} headings have no whole-cell moves; use heading_vectors")
    return heading_vectors(n_headings).astype(np.int64)


def move_lengths_m(n_headings: int, move_m: float) -> np.ndarray:
    """Length of every heading's move vector in metres, float64 ``(n,)``."""
    v = heading_vectors(n_headings)
    return np.hypot(v[:, 0], v[:, 1]) * move_m


@dataclass(frozen=True)
class Dynamics:
    """How the vehicle executes a move.

    Parameters
    ----------
    n_actions : number of headings, 4, 8 (default) or 16; action ``a`` is heading ``a``.
    slip : probability the executed heading is a neighbouring one (one step clockwise
        or anticlockwise, split evenly), per move.
    stall : probability the vehicle makes no commanded motion on a move (drift still acts).
    drift_scale : multiplies every drift zone's push and spread (1 = as forecast).
    edge : ``"boundary"`` (leaving the boundary ends the run as an incident) or
        ``"wall"`` (the landing cell is clamped into the grid; if it is outside the
        boundary the vehicle stays put).
    step_cost : ``"length"`` (a move costs its length in metres, default) or
        ``"move"`` (every move costs one move length), times the start cell's factor.
    hazard_penalty_m : penalty for hazards without their own ``penalty_m`` and for
        boundary incidents; ``None`` derives it from the site.
    move_m : move length in metres (distance between heading decisions); ``None``
        means one cell of the grid the model is built on.
    """

    n_actions: int = 8
    slip: float = 0.1
    stall: float = 0.0
    drift_scale: float = 1.0
    edge: str = "boundary"
    step_cost: str = "length"
    hazard_penalty_m: float | None = None
    move_m: float | None = None

    def __post_init__(self):
        check_headings(self.n_actions)
        checks.probability(self.slip, "Dynamics.slip")
        checks.probability(self.stall, "Dynamics.stall")
        if self.slip + self.stall > 1.0 + 1e-12:
            raise SettingsError(f"Dynamics.slip + Dynamics.stall must be at most 1, got {self.slip + self.stall:g}")
        checks.drift_scale(self.drift_scale, "Dynamics.drift_scale")
        checks.one_of(self.edge, "Dynamics.edge", ("boundary", "wall"))
        checks.one_of(self.step_cost, "Dynamics.step_cost", ("length", "move"))
        checks.positive_metres(self.hazard_penalty_m, "Dynamics.hazard_penalty_m", unset=True)
        checks.positive_metres(self.move_m, "Dynamics.move_m", unset=True)

    def move_length_m(self, cell_m: float) -> float:
        """The move length on a grid of ``cell_m``, refusing a move shorter than a cell."""
        move = float(cell_m) if self.move_m is None else float(self.move_m)
        if move < cell_m * (1.0 - 1e-12):
            raise SettingsError(
                f"Dynamics.move_m {move:g} m is shorter than the cell ({cell_m:g} m): a move must reach past its "
                "own cell; use a smaller GridSpec.cell_m or a longer Dynamics.move_m"
            )
        return move


def travel_budget_m(budget_m: float | None = None, budget_min: float | None = None,
                    speed_mps: float | None = None) -> float | None:
    """A travel budget in metres, given in metres or in minutes at a ground speed.

    Parameters
    ----------
    budget_m : metres travelled; or
    budget_min : minutes of travel at ``speed_mps`` metres per second over ground.

    >>> travel_budget_m(budget_min=12.0, speed_mps=2.5)
    1800.0
    """
    if budget_min is None:
        if speed_mps is not None and budget_m is None:
            raise SettingsError("PlanSettings.speed_mps is the speed a time budget (PlanSettings.budget_min) is "
                                "travelled at; give PlanSettings.budget_min with it")
        return checks.positive_metres(budget_m, "PlanSettings.budget_m", unset=True)
    if budget_m is not None:
        raise SettingsError("give the travel budget once: PlanSettings.budget_m (metres) or "
                            "PlanSettings.budget_min (minutes), not both")
    for name, value in (("PlanSettings.budget_min", budget_min), ("PlanSettings.speed_mps", speed_mps)):
        if value is None:
            raise SettingsError("PlanSettings.budget_min needs PlanSettings.speed_mps, the vehicle's speed over "
                                "ground in metres per second, to turn minutes into metres travelled")
        checks.number(value, name, low=0.0, low_open=True, says="a positive number")
    return float(budget_min) * 60.0 * float(speed_mps)


def moves_within(budget_m: float, move_m: float) -> int:
    """Whole moves a travel budget of ``budget_m`` metres allows (each decision travels ``move_m``)."""
    return int(math.floor(budget_m / move_m + 1e-9))


# ----------------------------------------------------------------------------- drift zones


def zone_per_move(zone, move_m: float, scale: float = 1.0) -> tuple[float, float, float]:
    """Mean push (east, north) and spread of a drift zone over one move, in metres.

    The move is ``move_m`` metres long; the spread is a standard deviation; ``zone`` is a
    ``planner.grid.DriftInfo``.
    """
    push = zone.ratio * move_m
    rad = math.radians(zone.toward_deg)
    sd = zone.spread * math.sqrt(move_m)
    return push * math.sin(rad) * scale, push * math.cos(rad) * scale, sd * scale


# ----------------------------------------------------------------------------- discretisation


def axis_distribution(mean: float, sd: float) -> tuple[np.ndarray, np.ndarray]:
    """A distribution over whole-cell offsets with the given mean and standard deviation (cells).

    The mean is always exact. The variance is exact whenever it is at least what the
    fractional mean needs (``f (1 - f)`` for fractional part ``f``); below that, the
    two neighbouring integers carry the mean and the variance is that minimum. Up to
    about one cell of spread the rule uses the three points ``k - 1, k, k + 1`` around
    the nearest integer ``k``; wider spreads use a sampled Gaussian whose variance is
    solved to match exactly, so the landing point keeps a Gaussian shape however many
    cells the spread covers.

    Returns offsets (int64) and probabilities (float64) with zero-probability points
    removed.

    Examples
    --------
    >>> offsets, probs = axis_distribution(0.25, 0.0)
    >>> offsets.tolist(), [round(p, 2) for p in probs]
    ([0, 1], [0.75, 0.25])
    """
    if not (math.isfinite(mean) and math.isfinite(sd) and sd >= 0):
        raise SettingsError(f"drift mean {mean!r} and spread {sd!r} (cells) must be finite, spread >= 0")
    k = int(round(mean))
    d = mean - k
    m2 = sd * sd + d * d
    if m2 <= abs(d) + 1e-15:
        if d == 0.0:
            return np.array([k], dtype=np.int64), np.array([1.0])
        lo = math.floor(mean)
        frac = mean - lo
        offsets, probs = np.array([lo, lo + 1], dtype=np.int64), np.array([1.0 - frac, frac])
    elif math.sqrt(m2) - 1e-12 <= 1.0:
        outer = m2
        plus, minus = (outer + d) / 2.0, (outer - d) / 2.0
        offsets = np.array([k - 1, k, k + 1], dtype=np.int64)
        probs = np.array([minus, 1.0 - outer, plus])
    else:
        offsets, probs = _wide_axis(mean, sd)
    probs = np.clip(probs, 0.0, 1.0)
    keep = probs > 1e-15
    offsets, probs = offsets[keep], probs[keep]
    return offsets, probs / probs.sum()


def _wide_axis(mean: float, sd: float) -> tuple[np.ndarray, np.ndarray]:
    """Two-point split of the mean convolved with a zero-mean sampled Gaussian.

    The Gaussian carries the rest of the variance; both moments are exact.
    """
    lo = math.floor(mean)
    frac = mean - lo
    rest = sd * sd - frac * (1.0 - frac)
    ks, g = symmetric_lattice_gaussian(rest)
    offsets = np.concatenate([ks + lo, ks + lo + 1])
    probs = np.concatenate([g * (1.0 - frac), g * frac])
    span = np.arange(offsets.min(), offsets.max() + 1)
    merged = np.bincount(offsets - span[0], weights=probs, minlength=span.size)
    return span.astype(np.int64), merged


def symmetric_lattice_gaussian(variance: float) -> tuple[np.ndarray, np.ndarray]:
    """Weights ``exp(-k^2 / (2 c))`` on ``|k| <= K``, normalised, of a given variance.

    ``c`` is solved so that the variance is exactly ``variance`` (>= 0.5); ``K`` covers
    ``SPREAD_REACH_SD`` deviations.
    """
    from scipy.optimize import brentq

    reach = int(math.ceil(SPREAD_REACH_SD * math.sqrt(variance))) + 1
    ks = np.arange(-reach, reach + 1)
    k2 = ks.astype(float) ** 2

    def weights(c):
        w = np.exp(-k2 / (2.0 * c))
        return w / w.sum()

    def excess(c):
        return float(weights(c) @ k2) - variance

    c = brentq(excess, 1e-3, 4.0 * variance + 4.0, xtol=1e-15, rtol=1e-15)
    return ks.astype(np.int64), weights(c)


def merge_offsets(offsets: np.ndarray, probs: np.ndarray):
    """Sum the probabilities of equal (d_row, d_col) offsets; drop zeros; renormalise."""
    uniq, inverse = np.unique(offsets, axis=0, return_inverse=True)
    merged = np.bincount(inverse.ravel(), weights=probs, minlength=len(uniq))
    keep = merged > 1e-15
    merged = merged[keep]
    return uniq[keep].astype(np.int64), merged / merged.sum()


def landing_distribution(vector_cells: tuple[float, float], pushes, chances, sds):
    """Offsets ``(n, 2)`` as (d_row, d_col) and probabilities of one move's landing cell.

    ``vector_cells`` is the commanded move (north, east) in cells; ``pushes`` the
    (east, north) mean push and ``sds`` the spread of every drift zone acting, in cells;
    ``chances`` whether each acts. The landing point is a mixture over the subsets of
    zones that act; each component (commanded move plus the acting zones' pushes, their
    variances added) is discretised per axis with :func:`axis_distribution`, so each
    keeps its mean exactly and its variance whenever the cell allows.
    """
    whole = [_whole_part(v) for v in vector_cells]
    frac = [v - w for v, w in zip(vector_cells, whole, strict=True)]
    n = len(pushes)
    parts_off, parts_p = [], []
    for subset in range(1 << n):
        weight = 1.0
        east, north, sd_list = frac[1], frac[0], []
        for j in range(n):
            if (subset >> j) & 1:
                weight *= chances[j]
                east += pushes[j][0]
                north += pushes[j][1]
                sd_list.append(sds[j])
            else:
                weight *= 1.0 - chances[j]
        if weight <= 0.0:
            continue
        sd = sd_list[0] if len(sd_list) == 1 else math.sqrt(sum(s * s for s in sd_list))
        cols, pc = axis_distribution(east, sd)
        rows, pr = axis_distribution(north, sd)
        parts_off.append(np.array([(r, c) for r in rows for c in cols], dtype=np.int64).reshape(-1, 2))
        parts_p.append(np.outer(pr, pc).ravel() * weight)
    offsets, probs = merge_offsets(np.vstack(parts_off), np.concatenate(parts_p))
    # A second normalisation: after the first the sum can still be a few ulps from 1.
    probs = probs / probs.sum()
    return offsets + np.array(whole, dtype=np.int64)[None, :], probs


def _whole_part(v: float) -> int:
    """The whole cells of a move component (snapping round-off: 2.9999999999 is 3)."""
    r = round(v)
    return int(r) if abs(v - r) < _WHOLE_CELL_TOLERANCE else int(math.floor(v))


@dataclass(frozen=True)
class LandingTables:
    """Landing distributions for every (drift class, executed heading), as flat arrays.

    Entry block ``ptr[c * n_dirs + k] : ptr[c * n_dirs + k + 1]`` of ``d_row``,
    ``d_col`` (int64) and ``prob`` (float64) is class ``c`` with heading ``k``
    executed; ``k = n_dirs - 1`` is a stall (no commanded motion). ``move_m`` is the
    move length the tables were made for.
    """

    ptr: np.ndarray
    d_row: np.ndarray
    d_col: np.ndarray
    prob: np.ndarray
    n_dirs: int
    move_m: float

    @property
    def max_support(self) -> int:
        """The most landing cells any one (class, heading) distribution has."""
        return int(np.diff(self.ptr).max(initial=1))


def landing_tables(grid, dynamics: Dynamics, scale: float | None = None) -> LandingTables:
    """The landing distributions of a vehicle on a grid (see :class:`LandingTables`).

    ``scale`` multiplies every drift push and spread (default: ``dynamics.drift_scale``).

    Raises
    ------
    SettingsError
        When the move is shorter than a cell, or a drift zone at this scale would
        push the vehicle further than the whole grid in one move.
    """
    scale = dynamics.drift_scale if scale is None else scale
    checks.drift_scale(scale, "drift scale")
    cell = grid.cell_m
    move = dynamics.move_length_m(cell)
    reach = max(grid.shape) * cell
    per_zone = []
    for d in grid.drifts:
        east, north, sd = zone_per_move(d, move, scale)
        span = math.hypot(east, north) + SPREAD_REACH_SD * sd
        if span > reach:
            raise SettingsError(
                f"drift zone {d.name!r} at drift scale {scale:g} pushes up to {span:.0f} m per move, "
                f"more than the whole grid ({reach:.0f} m)"
            )
        per_zone.append(((east / cell, north / cell), sd / cell, d.chance))
    vectors = heading_vectors(dynamics.n_actions) * (move / cell)
    directions = [tuple(v) for v in vectors] + [(0.0, 0.0)]
    ptr, rows, cols, probs = [0], [], [], []
    for members in grid.drift_members:
        zones = [per_zone[m] for m in members]
        for vec in directions:
            off, p = landing_distribution(vec, [z[0] for z in zones], [z[2] for z in zones], [z[1] for z in zones])
            rows.append(off[:, 0])
            cols.append(off[:, 1])
            probs.append(p)
            ptr.append(ptr[-1] + len(p))
    return LandingTables(ptr=np.asarray(ptr, dtype=np.int64), d_row=np.concatenate(rows),
                         d_col=np.concatenate(cols), prob=np.concatenate(probs), n_dirs=len(directions),
                         move_m=move)
