"""The kernels that fill the outcome table, their inputs as named records, and a reference.

``planner.model.build_model`` packs the grid's cells into a :class:`Cells` record and
the vehicle's executed headings and landing tables into a :class:`Moves` record, and
the numba kernels here turn them into the merged outcome lists of every (state,
action). The event codes are defined here, once, for every kernel and every stage.

:func:`reference_outcomes` computes the same outcomes of one (state, action) in plain
Python by another method (the swept path found from the segment's parametric
intersection with each cell's closed box, in exact rational arithmetic), for tests on
tiny grids.
"""

from __future__ import annotations

from collections import namedtuple
from fractions import Fraction

import numba
import numpy as np

#: Event codes of an outcome: the run goes on, reaches the goal, leaves the boundary,
#: or ends in ending hazard ``h`` (code ``EVENT_HAZARD + h``).
EVENT_NONE = 0
EVENT_GOAL = 1
EVENT_BOUNDARY = 2
EVENT_HAZARD = 3
#: Monte Carlo end codes besides the events: a run that can never end (it entered a
#: trapped state) and a run stopped by the step cap.
END_NEVER = 0
END_TRUNCATED = -1

#: The grid as the kernels read it. ``label`` int64 ``(n_cells,)`` (``outside``, -1 free,
#: or a hazard index), ``goal`` bool, ``cost_factor`` float64, ``drift_class`` int64, all
#: ``(n_cells,)``; ``ends`` bool and ``penalty`` float64 ``(n_hazards,)`` (one dummy entry
#: without hazards); ``boundary_penalty`` float; ``wall`` bool (leaving the grid is
#: blocked instead of an incident); ``outside`` the label of cells outside the boundary.
Cells = namedtuple("Cells", "n_rows n_cols label goal active cost_factor drift_class ends penalty "
                            "boundary_penalty wall outside")
#: The vehicle as the kernels read it. ``n_headings``; ``step_m`` float64
#: ``(n_headings,)`` the cost length of each action; ``p_main``, ``p_side``, ``p_stall``
#: the probabilities of the intended heading, of each neighbour and of a stall; the
#: landing tables: entries ``ptr[b]:ptr[b + 1]`` of ``d_row``, ``d_col`` (cells) and
#: ``d_prob`` for block ``b = drift_class * (n_headings + 1) + executed heading``
#: (heading ``n_headings``: a stall).
Moves = namedtuple("Moves", "n_headings step_m p_main p_side p_stall ptr d_row d_col d_prob")
#: The outcome table as the solvers' and samplers' kernels read it (see ``planner.model.Model``).
Table = namedtuple("Table", "offsets next_state prob reward event crossed")
#: Work arrays of one kernel call: the swept path and one (state, action)'s outcomes.
Scratch = namedtuple("Scratch", "path_r path_c next prob reward event crossed")


def scratch_for(moves: Moves) -> Scratch:
    """Work arrays wide enough for the longest swept path and the widest outcome list."""
    span = 4
    if moves.d_row.size:
        span = max(span, int(np.max(np.abs(moves.d_row) + np.abs(moves.d_col))) + 4)
    widest = max(1, int(np.max(np.diff(moves.ptr)))) if moves.ptr.size > 1 else 1
    n_out = 4 * widest
    return Scratch(np.empty(2 * span + 4, np.int64), np.empty(2 * span + 4, np.int64), np.empty(n_out, np.int64),
                   np.empty(n_out, np.float64), np.empty(n_out, np.float64), np.empty(n_out, np.int64),
                   np.empty(n_out, np.int64))


# ----------------------------------------------------------------------------- kernels


@numba.njit(cache=True)
def _trace(r0, c0, dr, dc, path_r, path_c):
    """Supercover traversal from cell (r0, c0) to (r0 + dr, c0 + dc).

    Writes the cells entered, in order, into ``path_r``/``path_c`` (the start cell
    excluded; both side cells when the segment passes exactly through a corner, the one
    in the current row first) and returns how many. Cells off the grid are written as
    they are (callers check).
    """
    n = 0
    nx, ny = abs(dc), abs(dr)
    sx = 1 if dc > 0 else -1
    sy = 1 if dr > 0 else -1
    x, y = c0, r0
    ix, iy = 0, 0
    while ix < nx or iy < ny:
        decision = (1 + 2 * ix) * ny - (1 + 2 * iy) * nx
        if decision == 0:
            path_r[n] = y
            path_c[n] = x + sx
            n += 1
            path_r[n] = y + sy
            path_c[n] = x
            n += 1
            x += sx
            y += sy
            ix += 1
            iy += 1
        elif decision < 0:
            x += sx
            ix += 1
        else:
            y += sy
            iy += 1
        path_r[n] = y
        path_c[n] = x
        n += 1
    return n


@numba.njit(cache=True)
def _outcome(cells, s, dr, dc, path_r, path_c):
    """Where a move from state ``s`` displaced by (dr, dc) cells ends.

    Returns (next_state, event, crossed mask, ending hazard or -1).
    """
    n_rows, n_cols = cells.n_rows, cells.n_cols
    r0 = s // n_cols
    c0 = s - r0 * n_cols
    r1 = r0 + dr
    c1 = c0 + dc
    if cells.wall:
        r1 = min(max(r1, 0), n_rows - 1)
        c1 = min(max(c1, 0), n_cols - 1)
        if cells.label[r1 * n_cols + c1] == cells.outside:
            return s, EVENT_NONE, np.int64(0), -1
    if r1 == r0 and c1 == c0:
        return s, EVENT_NONE, np.int64(0), -1
    n = _trace(r0, c0, r1 - r0, c1 - c0, path_r, path_c)
    crossed = np.int64(0)
    for i in range(n):
        r = path_r[i]
        c = path_c[i]
        if r < 0 or r >= n_rows or c < 0 or c >= n_cols or cells.label[r * n_cols + c] == cells.outside:
            if cells.wall:
                return s, EVENT_NONE, np.int64(0), -1
            return -1, EVENT_BOUNDARY, crossed, -1
        cell = r * n_cols + c
        lab = cells.label[cell]
        if cells.goal[cell]:
            return cell, EVENT_GOAL, crossed, -1
        if lab >= 0:
            if cells.ends[lab]:
                return cell, EVENT_HAZARD + lab, crossed, lab
            crossed |= np.int64(1) << lab
    return r1 * n_cols + c1, EVENT_NONE, crossed, -1


@numba.njit(cache=True)
def _block(cells, moves, s, a, work):
    """Merged outcomes of (s, a) into the ``work`` arrays; returns their count."""
    n_a = moves.n_headings
    k = 0
    base_block = cells.drift_class[s] * (n_a + 1)
    base = -moves.step_m[a] * cells.cost_factor[s]
    for j in range(4):
        if j == 0:
            p_dir, heading = moves.p_main, a
        elif j == 1:
            p_dir, heading = moves.p_side, (a + 1) % n_a
        elif j == 2:
            p_dir, heading = moves.p_side, (a - 1) % n_a
        else:
            p_dir, heading = moves.p_stall, n_a
        if p_dir <= 0.0:
            continue
        block = base_block + heading
        for q in range(moves.ptr[block], moves.ptr[block + 1]):
            p = p_dir * moves.d_prob[q]
            if p <= 0.0:
                continue
            nxt, ev, crossed, haz = _outcome(cells, s, moves.d_row[q], moves.d_col[q], work.path_r, work.path_c)
            found = -1
            for i in range(k):
                if work.next[i] == nxt and work.event[i] == ev and work.crossed[i] == crossed:
                    found = i
                    break
            if found >= 0:
                work.prob[found] += p
                continue
            reward = base
            for h in range(cells.penalty.size):
                if (crossed >> h) & 1:
                    reward -= cells.penalty[h]
            if ev == EVENT_BOUNDARY:
                reward -= cells.boundary_penalty
            elif ev >= EVENT_HAZARD:
                reward -= cells.penalty[haz]
            work.next[k] = nxt
            work.prob[k] = p
            work.reward[k] = reward
            work.event[k] = ev
            work.crossed[k] = crossed
            k += 1
    return k


@numba.njit(cache=True)
def count_outcomes(cells, moves, work):
    """Outcomes of every (state, action), int64 ``(n_cells * n_headings,)`` (0 for inactive states)."""
    n_a = moves.n_headings
    n_s = cells.n_rows * cells.n_cols
    counts = np.zeros(n_s * n_a, np.int64)
    for s in range(n_s):
        if cells.active[s]:
            for a in range(n_a):
                counts[s * n_a + a] = _block(cells, moves, s, a, work)
    return counts


@numba.njit(cache=True)
def fill_outcomes(cells, moves, work, offsets):
    """The flat outcome arrays (next_state, prob, reward, event, crossed) at ``offsets``."""
    n_a = moves.n_headings
    n_s = cells.n_rows * cells.n_cols
    total = offsets[-1]
    next_state = np.empty(total, np.int32)
    prob = np.empty(total, np.float64)
    reward = np.empty(total, np.float64)
    event = np.empty(total, np.int16)
    crossed = np.empty(total, np.int64)
    for s in range(n_s):
        if not cells.active[s]:
            continue
        for a in range(n_a):
            k = _block(cells, moves, s, a, work)
            lo = offsets[s * n_a + a]
            for i in range(k):
                next_state[lo + i] = work.next[i]
                prob[lo + i] = work.prob[i]
                reward[lo + i] = work.reward[i]
                event[lo + i] = work.event[i]
                crossed[lo + i] = work.crossed[i]
    return next_state, prob, reward, event, crossed


# ----------------------------------------------------------------------------- reference


def swept_cells(r0: int, c0: int, r1: int, c1: int) -> list[tuple[int, int]]:
    """Cells the segment between two cell centres passes through or touches, in order.

    Plain-Python reference for the kernels' traversal: a cell is on the path when the
    closed segment from the centre of (r0, c0) to the centre of (r1, c1) meets its
    closed box (slab method, exact fractions); cells are ordered by the parameter at
    which the segment first meets them; where it passes exactly through a corner, the
    two side cells come first (the one in the current row before the other), then the
    diagonal one. The start cell is left out.

    >>> swept_cells(0, 0, 1, 2)
    [(0, 1), (1, 1), (1, 2)]
    """
    found = []
    for r in range(min(r0, r1) - 1, max(r0, r1) + 2):
        for c in range(min(c0, c1) - 1, max(c0, c1) + 2):
            if (r, c) == (r0, c0):
                continue
            lo, hi = Fraction(0), Fraction(1)
            for start, delta, low in ((Fraction(2 * c0 + 1, 2), c1 - c0, c), (Fraction(2 * r0 + 1, 2), r1 - r0, r)):
                if delta == 0:
                    if not low <= start <= low + 1:
                        lo, hi = Fraction(1), Fraction(0)
                    continue
                t_a, t_b = (low - start) / delta, (low + 1 - start) / delta
                lo, hi = max(lo, min(t_a, t_b)), min(hi, max(t_a, t_b))
            if lo <= hi:
                # at a corner the two side cells come before the diagonal one, the one
                # in the current row first
                found.append((lo, abs(r - r0) + abs(c - c0), abs(r - r0), r, c))
    return [(r, c) for *_, r, c in sorted(found)]


def reference_outcomes(cells: Cells, moves: Moves, s: int, a: int) -> dict[tuple[int, int, int], list[float]]:
    """The outcomes of (state ``s``, action ``a``), merged, in plain Python.

    Returns ``{(next_state, event, crossed): [probability, reward]}`` by the rules the
    model documents: executed heading by slip and stall, landing by the landing table,
    the first goal, ending hazard or boundary along the swept path decides, non-ending
    hazards passed are crossed; with ``wall`` a landing off the grid is clamped onto it
    and a move whose path leaves the boundary stays put.
    """
    n_cols, n_a = cells.n_cols, moves.n_headings
    r0, c0 = divmod(s, n_cols)
    out: dict[tuple[int, int, int], list[float]] = {}
    executed = [(moves.p_main, a), (moves.p_side, (a + 1) % n_a), (moves.p_side, (a - 1) % n_a),
                (moves.p_stall, n_a)]
    for p_dir, heading in executed:
        if p_dir <= 0:
            continue
        block = int(cells.drift_class[s]) * (n_a + 1) + heading
        for q in range(moves.ptr[block], moves.ptr[block + 1]):
            p = p_dir * float(moves.d_prob[q])
            if p <= 0:
                continue
            key, hazard = _reference_landing(cells, r0, c0, r0 + int(moves.d_row[q]), c0 + int(moves.d_col[q]))
            if key in out:
                out[key][0] += p
                continue
            nxt, event, crossed = key
            reward = -float(moves.step_m[a]) * float(cells.cost_factor[s])
            reward -= sum(float(cells.penalty[h]) for h in range(len(cells.penalty)) if (crossed >> h) & 1)
            if event == EVENT_BOUNDARY:
                reward -= float(cells.boundary_penalty)
            elif event >= EVENT_HAZARD:
                reward -= float(cells.penalty[hazard])
            out[key] = [p, reward]
    return out


def _reference_landing(cells: Cells, r0: int, c0: int, r1: int, c1: int):
    n_rows, n_cols = cells.n_rows, cells.n_cols
    stay = ((r0 * n_cols + c0, EVENT_NONE, 0), -1)
    if cells.wall:
        r1, c1 = min(max(r1, 0), n_rows - 1), min(max(c1, 0), n_cols - 1)
        if cells.label[r1 * n_cols + c1] == cells.outside:
            return stay
    if (r1, c1) == (r0, c0):
        return stay
    crossed = 0
    for r, c in swept_cells(r0, c0, r1, c1):
        off = not (0 <= r < n_rows and 0 <= c < n_cols)
        if off or cells.label[r * n_cols + c] == cells.outside:
            return stay if cells.wall else ((-1, EVENT_BOUNDARY, crossed), -1)
        cell = r * n_cols + c
        lab = int(cells.label[cell])
        if cells.goal[cell]:
            return (cell, EVENT_GOAL, crossed), -1
        if lab >= 0:
            if cells.ends[lab]:
                return (cell, EVENT_HAZARD + lab, crossed), lab
            crossed |= 1 << lab
    return (r1 * n_cols + c1, EVENT_NONE, crossed), -1
