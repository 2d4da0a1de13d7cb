"""The stochastic grid MDP: one transition table that every later stage reads.

This stage combines the grid's geometry with the vehicle's motion
(``planner.motion``: headings, move length, slip, stall, the discretised landing
distributions) into the outcome table, applying the swept-path rule (incidents,
edges, goal) and the costs. The table is CSR-style: the outcomes of (state ``s``, action ``a``) are the
entries ``offsets[s * n_actions + a] : offsets[s * n_actions + a + 1]`` of the flat
arrays ``next_state``, ``prob``, ``reward``, ``event`` and ``crossed``. Learners sample
from it and the exact methods build sparse matrices from it, so they cannot disagree.

Event codes: ``EVENT_NONE`` (the run goes on), ``EVENT_GOAL``, ``EVENT_BOUNDARY`` and
``EVENT_HAZARD + h`` for ending hazard ``h``. ``crossed`` is a bit mask of the
non-ending hazards the move passed through (bit ``h`` for hazard ``h``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

from planner import checks
from planner.errors import SettingsError
from planner.grid import FREE, OUTSIDE, Grid, cost_to_goal, estimate_model_bytes
from planner.motion import Dynamics, landing_tables, move_lengths_m

# The event codes are defined once, beside the kernels that write them.
from planner.outcomes import (
    EVENT_BOUNDARY,
    EVENT_GOAL,
    EVENT_HAZARD,
    EVENT_NONE,
    Cells,
    Moves,
    Table,
    count_outcomes,
    fill_outcomes,
    scratch_for,
)

#: Probabilities of each (state, action) must sum to 1 within this.
PROB_TOLERANCE = 1e-9


@dataclass(frozen=True)
class Model:
    """The outcome table of the grid MDP (see the module docstring for the layout).

    Attributes
    ----------
    offsets : int64 ``(n_states * n_actions + 1,)``.
    next_state : int32 ``(n_outcomes,)``; for outcomes that end the run, the cell where
        it ended (goal or hazard cell), or -1 when it left the boundary. Only ``event``
        says whether the run goes on.
    prob, reward : float64 ``(n_outcomes,)``; reward is minus the cost in metres-equivalent.
    event : int16 ``(n_outcomes,)``.
    crossed : int64 ``(n_outcomes,)``, bit mask of non-ending hazards crossed.
    active : bool ``(n_states,)``, states the vehicle can be in (others have no outcomes).
    move_m : float64 ``(n_actions,)``, commanded length of each action in metres.
    event_names : name of each event code (``"none"``, ``"goal"``, ``"boundary"``, hazards).
    penalty_m : float64 ``(n_hazards,)``, the resolved penalty of each hazard.
    """

    shape: tuple[int, int]
    n_actions: int
    dynamics: Dynamics
    offsets: np.ndarray
    next_state: np.ndarray
    prob: np.ndarray
    reward: np.ndarray
    event: np.ndarray
    crossed: np.ndarray
    active: np.ndarray
    goal: np.ndarray
    start: int
    move_m: np.ndarray
    event_names: tuple[str, ...]
    penalty_m: np.ndarray
    boundary_penalty_m: float
    warnings: tuple[str, ...] = field(default=())

    @property
    def n_states(self) -> int:
        """Number of states (one per cell)."""
        return int(self.shape[0] * self.shape[1])

    @property
    def n_outcomes(self) -> int:
        """Number of outcomes over all state-action pairs."""
        return int(self.prob.size)

    @property
    def nbytes(self) -> int:
        """Memory held by the outcome arrays, bytes."""
        arrays = (self.offsets, self.next_state, self.prob, self.reward, self.event, self.crossed)
        return int(sum(a.nbytes for a in arrays))

    def outcomes(self, state: int, action: int) -> dict[str, np.ndarray]:
        """The outcome block of one (state, action), as a dict of arrays."""
        k = state * self.n_actions + action
        lo, hi = self.offsets[k], self.offsets[k + 1]
        return {
            "next_state": self.next_state[lo:hi], "prob": self.prob[lo:hi], "reward": self.reward[lo:hi],
            "event": self.event[lo:hi], "crossed": self.crossed[lo:hi],
        }

    def table(self) -> Table:
        """The outcome arrays as one record, the form the numba kernels take."""
        return Table(self.offsets, self.next_state, self.prob, self.reward, self.event, self.crossed)


def default_penalty_m(grid: Grid, n_actions: int = 8) -> float:
    """The hazard penalty used when the site sets none, in metres-equivalent.

    Twice the longest cheapest route to the goal from any cell that can reach it,
    rounded up to a whole 10 m: ending the run is then always worse than going to the
    goal by the longest sensible way, with a margin.
    """
    cost = cost_to_goal(grid, n_actions)
    reachable = cost[np.isfinite(cost)]
    longest = float(reachable.max()) if reachable.size else grid.cell_m
    return float(10.0 * math.ceil(max(2.0 * longest, 10.0 * grid.cell_m) / 10.0))


def resolve_penalties(grid: Grid, dynamics: Dynamics) -> tuple[np.ndarray, float, list[str]]:
    """Per-hazard penalty and the boundary penalty, with warnings for unsafe values."""
    derived = default_penalty_m(grid, dynamics.n_actions)
    base = derived if dynamics.hazard_penalty_m is None else dynamics.hazard_penalty_m
    penalties = np.array([base if h.penalty_m is None else h.penalty_m for h in grid.hazards], dtype=float)
    notes = []
    longest = derived / 2.0
    if dynamics.hazard_penalty_m is not None and dynamics.hazard_penalty_m <= longest:
        notes.append(
            f"--penalty {dynamics.hazard_penalty_m:g} m is not above the longest route to the goal "
            f"({longest:.0f} m): from some cells ending the run would be the cheapest plan"
        )
    for info in grid.hazards:
        if info.ends_run and info.penalty_m is not None and info.penalty_m <= longest:
            notes.append(
                f"hazard {info.name!r}: penalty_m {info.penalty_m:g} is not above the longest route to the goal "
                f"({longest:.0f} m): from some cells ending the run there would be the cheapest plan"
            )
    return penalties, float(base), notes


def estimate_bytes(grid: Grid, dynamics: Dynamics) -> int:
    """Upper estimate of the model's memory, computed before building it."""
    tables = landing_tables(grid, dynamics)
    support = np.diff(tables.ptr).reshape(-1, tables.n_dirs).max(axis=1)[grid.drift_class.ravel()]
    active = grid.passable().ravel() & ~grid.goal.ravel()
    n_dirs = 3 + (1 if dynamics.stall > 0 else 0)
    mean_outcomes = float(support[active].mean()) * n_dirs if active.any() else 1.0
    return estimate_model_bytes(int(active.sum()), dynamics.n_actions, mean_outcomes) + 8 * grid.n_cells * 8


def kernel_inputs(grid: Grid, dynamics: Dynamics):
    """The grid and the vehicle packed as the outcome kernels read them.

    Returns ``(cells, moves, move_m, penalties, boundary_penalty, notes)``: the
    :class:`planner.outcomes.Cells` and :class:`planner.outcomes.Moves` records, each
    action's commanded length, the resolved penalties and the notes about them.
    """
    tables = landing_tables(grid, dynamics)
    n_headings = dynamics.n_actions
    penalties, boundary_penalty, notes = resolve_penalties(grid, dynamics)
    n_rows, n_cols = grid.shape
    label = grid.label.ravel().astype(np.int64)
    ends = np.array([h.ends_run for h in grid.hazards], dtype=np.bool_)
    if ends.size == 0:
        ends = np.zeros(1, dtype=np.bool_)
        penalties_k = np.zeros(1)
    else:
        penalties_k = penalties
    goal = grid.goal.ravel().astype(np.bool_)
    active = grid.passable().ravel() & ~goal
    move_m = move_lengths_m(n_headings, tables.move_m)
    step_m = move_m if dynamics.step_cost == "length" else np.full(n_headings, tables.move_m)
    cells = Cells(
        n_rows=n_rows, n_cols=n_cols, label=label, goal=goal, active=active,
        cost_factor=grid.cost_factor.ravel().astype(np.float64), drift_class=grid.drift_class.ravel().astype(np.int64),
        ends=ends, penalty=penalties_k.astype(np.float64), boundary_penalty=float(boundary_penalty),
        wall=dynamics.edge == "wall", outside=OUTSIDE,
    )
    moves = Moves(
        n_headings=n_headings, step_m=step_m.astype(np.float64), p_main=1.0 - dynamics.slip - dynamics.stall,
        p_side=dynamics.slip / 2.0, p_stall=float(dynamics.stall), ptr=tables.ptr, d_row=tables.d_row,
        d_col=tables.d_col, d_prob=tables.prob,
    )
    return cells, moves, move_m, penalties, boundary_penalty, notes


def build_model(grid: Grid, dynamics: Dynamics = Dynamics()) -> Model:
    """Build the outcome table of the grid MDP.

    Every (state, action) of an active state gets the merged list of outcomes of:
    executed heading (intended with ``1 - slip - stall``, each neighbour with
    ``slip / 2``, a stall with ``stall``) times the landing distribution of that
    heading in the start cell's drift class (``planner.motion.landing_tables``); the
    swept path from the start centre to the landing centre is traversed cell by cell
    (supercover) and the first goal, ending hazard or boundary crossing decides.
    """
    cells, moves, move_m, penalties, boundary_penalty, notes = kernel_inputs(grid, dynamics)
    n_headings = moves.n_headings
    active, goal = cells.active, cells.goal
    work = scratch_for(moves)
    counts = count_outcomes(cells, moves, work)
    offsets = np.zeros(counts.size + 1, dtype=np.int64)
    np.cumsum(counts, out=offsets[1:])
    next_state, prob, reward, event, crossed = fill_outcomes(cells, moves, work, offsets)
    sums = np.add.reduceat(prob, offsets[:-1][counts > 0]) if prob.size else np.zeros(0)
    if sums.size and np.max(np.abs(sums - 1.0)) > PROB_TOLERANCE:
        raise ArithmeticError(f"outcome probabilities sum to {sums.min()}..{sums.max()}, not 1 (a bug)")
    names = ("none", "goal", "boundary") + tuple(h.name for h in grid.hazards)
    return Model(
        shape=grid.shape, n_actions=n_headings, dynamics=dynamics, offsets=offsets, next_state=next_state,
        prob=prob, reward=reward, event=event, crossed=crossed, active=active, goal=goal,
        start=grid.start_index, move_m=move_m, event_names=names, penalty_m=penalties,
        boundary_penalty_m=boundary_penalty, warnings=tuple(notes),
    )


@dataclass(frozen=True)
class Chain:
    """The Markov chain a stochastic policy induces on a model.

    Attributes
    ----------
    transient : csr ``(n_states, n_states)``, probability of moving to another state
        with the run going on.
    absorb : csr ``(n_states, n_events)``, probability of ending the run with each event
        on the next move (column ``n_events`` when ``absorb_crossing`` is set: the run
        crossed that non-ending hazard).
    reward : float64 ``(n_states,)``, expected reward of the next move.
    move_m : float64 ``(n_states,)``, expected commanded metres of the next move.
    """

    transient: object
    absorb: object
    reward: np.ndarray
    move_m: np.ndarray


def policy_chain(model: Model, action_probs: np.ndarray, *, absorb_crossing: int | None = None) -> Chain:
    """Sparse matrices of the chain induced by a stochastic policy.

    Parameters
    ----------
    action_probs : float ``(n_states, n_actions)``, rows of active states sum to 1.
    absorb_crossing : index of a non-ending hazard to treat as absorbing (for the
        probability of at least one entry); such outcomes go to the extra last column
        of ``absorb``.

    Notes
    -----
    Both matrices are built straight from the outcome table, one state at a time,
    in canonical CSR form (sorted column indices, duplicates summed, 32-bit indices
    while they fit): outcomes of different actions that land in the same cell or end
    with the same event are merged per row. Actions the policy never takes (zero
    probability) contribute no entries, not even explicit zeros. Working memory is
    the size of the result, not of the outcome table, so a few-hundred-thousand-cell
    model needs no outcome-sized temporaries.
    """
    from scipy.sparse import csr_matrix

    n_s, n_a = model.n_states, model.n_actions
    action_probs = np.ascontiguousarray(action_probs, dtype=np.float64)
    if action_probs.shape != (n_s, n_a):
        raise SettingsError(f"action_probs must have shape {(n_s, n_a)}, got {action_probs.shape}")
    taken = action_probs[model.active]
    if taken.size and not (np.all(np.isfinite(taken)) and taken.min() >= 0.0):
        raise SettingsError("policy action probabilities must be finite and non-negative on every active state")
    row_sums = taken.sum(axis=1)
    if row_sums.size and np.max(np.abs(row_sums - 1.0)) > PROB_TOLERANCE:
        raise SettingsError("policy action probabilities do not sum to 1 on every active state")
    n_events = len(model.event_names)
    crossing = -1
    if absorb_crossing is not None:
        crossing = int(absorb_crossing)
        if not 0 <= crossing < 63:
            raise SettingsError(f"absorb_crossing must be a hazard index in [0, 63), got {absorb_crossing!r}")
    n_cols = n_events + (crossing >= 0)
    t_ptr, a_ptr = _chain_pattern(model.offsets, model.next_state, model.event, model.crossed, action_probs,
                                  crossing, n_events, n_cols)
    t_idx, t_val, a_idx, a_val, reward = _chain_fill(model.offsets, model.next_state, model.prob, model.reward,
                                                     model.event, model.crossed, action_probs, crossing, n_events,
                                                     n_cols, t_ptr, a_ptr)
    transient = _csr(t_val, t_idx, t_ptr, (n_s, n_s), csr_matrix)
    absorb = _csr(a_val, a_idx, a_ptr, (n_s, n_cols), csr_matrix)
    move_m = (action_probs * model.move_m[None, :]).sum(axis=1) * model.active
    return Chain(transient=transient, absorb=absorb, reward=reward, move_m=move_m)


def _csr(data, indices, indptr, shape, csr_matrix):
    """A canonical CSR matrix over arrays that are already canonical (no copies, no checks)."""
    if indptr[-1] <= np.iinfo(np.int32).max:
        indptr = indptr.astype(np.int32)
    else:
        indices = indices.astype(np.int64)
    matrix = csr_matrix((data, indices, indptr), shape=shape, copy=False)
    # The rows were merged and sorted while building, so scipy need not check again.
    matrix.has_canonical_format = True
    return matrix


@numba.njit(cache=True)
def _chain_column(k, event, crossed, crossing, crossing_col):
    """Column of outcome ``k``: 0 when the run goes on, else its absorbing column."""
    ev = np.int64(event[k])
    if ev == EVENT_NONE and crossing >= 0 and (crossed[k] >> crossing) & 1:
        ev = crossing_col
    return ev


@numba.njit(cache=True)
def _chain_pattern(offsets, next_state, event, crossed, action_probs, crossing, crossing_col, n_cols):
    """Row pointers of the transient and absorbing matrices (distinct entries per state)."""
    n_s, n_a = action_probs.shape
    seen = np.full(n_s, -1, np.int64)
    seen_col = np.full(n_cols, -1, np.int64)
    t_ptr = np.zeros(n_s + 1, np.int64)
    a_ptr = np.zeros(n_s + 1, np.int64)
    for s in range(n_s):
        n_t = 0
        n_b = 0
        for a in range(n_a):
            if action_probs[s, a] == 0.0:
                continue
            for k in range(offsets[s * n_a + a], offsets[s * n_a + a + 1]):
                col = _chain_column(k, event, crossed, crossing, crossing_col)
                if col == EVENT_NONE:
                    j = next_state[k]
                    if seen[j] != s:
                        seen[j] = s
                        n_t += 1
                elif seen_col[col] != s:
                    seen_col[col] = s
                    n_b += 1
        t_ptr[s + 1] = t_ptr[s] + n_t
        a_ptr[s + 1] = a_ptr[s] + n_b
    return t_ptr, a_ptr


@numba.njit(cache=True, inline="always")
def _accumulate(where, idx, val, lo, at, key, weight):
    """Add ``weight`` to entry ``key`` of the row being built (``lo:at``); returns the new end.

    ``where[key]`` remembers the slot of ``key``; a slot before ``lo`` belongs to an
    earlier row, so the key is new to this one.
    """
    slot = where[key]
    if slot < lo:
        where[key] = at
        idx[at] = key
        val[at] = weight
        return at + 1
    val[slot] += weight
    return at


@numba.njit(cache=True)
def _sort_row(indices, values, lo, hi):
    """Sort one CSR row by column (insertion sort: rows are short and nearly sorted)."""
    for i in range(lo + 1, hi):
        key = indices[i]
        val = values[i]
        j = i - 1
        while j >= lo and indices[j] > key:
            indices[j + 1] = indices[j]
            values[j + 1] = values[j]
            j -= 1
        indices[j + 1] = key
        values[j + 1] = val


@numba.njit(cache=True)
def _chain_fill(offsets, next_state, prob, reward, event, crossed, action_probs, crossing, crossing_col, n_cols,
                t_ptr, a_ptr):
    """Entries of the transient and absorbing matrices and the expected reward per state.

    Duplicates (the same next state or event reached through several actions or
    outcomes) are summed in outcome order; ``where`` remembers each column's slot in
    the current row, and a slot before the row's start means "not in this row yet".
    """
    n_s, n_a = action_probs.shape
    t_idx = np.empty(t_ptr[-1], np.int32)
    t_val = np.zeros(t_ptr[-1], np.float64)
    a_idx = np.empty(a_ptr[-1], np.int32)
    a_val = np.zeros(a_ptr[-1], np.float64)
    expected = np.zeros(n_s, np.float64)
    where = np.full(n_s, -1, np.int64)
    where_col = np.full(n_cols, -1, np.int64)
    for s in range(n_s):
        t_lo = t_ptr[s]
        t_at = t_lo
        a_lo = a_ptr[s]
        a_at = a_lo
        total = 0.0
        for a in range(n_a):
            w = action_probs[s, a]
            if w == 0.0:
                continue
            for k in range(offsets[s * n_a + a], offsets[s * n_a + a + 1]):
                wp = w * prob[k]
                total += wp * reward[k]
                col = _chain_column(k, event, crossed, crossing, crossing_col)
                if col == EVENT_NONE:
                    t_at = _accumulate(where, t_idx, t_val, t_lo, t_at, next_state[k], wp)
                else:
                    a_at = _accumulate(where_col, a_idx, a_val, a_lo, a_at, col, wp)
        expected[s] = total
        _sort_row(t_idx, t_val, t_lo, t_at)
        _sort_row(a_idx, a_val, a_lo, a_at)
    return t_idx, t_val, a_idx, a_val, expected


def epsilon_greedy(greedy_action: np.ndarray, n_actions: int, epsilon: float) -> np.ndarray:
    """Action probabilities of executing ``greedy_action`` with noise ``epsilon``.

    Greedy with probability ``1 - epsilon``, uniform over all actions otherwise.
    """
    checks.probability(epsilon, "epsilon")
    greedy_action = np.asarray(greedy_action, dtype=np.int64)
    probs = np.full((greedy_action.size, n_actions), epsilon / n_actions)
    probs[np.arange(greedy_action.size), greedy_action] += 1.0 - epsilon
    return probs


#: A run that needs more moves than this on average to end, from some cell, is
#: treated as looping for ever there: no vehicle runs that long, and a linear solve
#: cannot resolve escape probabilities that small (they sit below round-off).
PRACTICALLY_FOREVER_MOVES = 1e9


def reaching(transient, targets: np.ndarray) -> np.ndarray:
    """States from which some state in ``targets`` can be reached through ``transient``.

    The targets are included; one walk of the reversed graph from a super-source.
    """
    from scipy.sparse import bmat, csr_matrix
    from scipy.sparse.csgraph import breadth_first_order

    n = transient.shape[0]
    out = np.zeros(n, dtype=bool)
    idx = np.flatnonzero(targets)
    if idx.size == 0:
        return out
    reverse = (transient.T > 0).astype(np.int8).tocsr()
    link = csr_matrix((np.ones(idx.size, np.int8), (np.zeros(idx.size, np.int64), idx)), shape=(1, n))
    graph = bmat([[csr_matrix((1, 1), dtype=np.int8), link], [None, reverse]], format="csr")
    order = breadth_first_order(graph, 0, directed=True, return_predecessors=False)
    out[order[order > 0] - 1] = True
    return out


def reaches_absorption(chain: Chain, active: np.ndarray) -> np.ndarray:
    """Which active states end the run, in practice, under the chain (bool ``(n_states,)``).

    An active state that cannot reach any absorbing outcome is trapped: the policy
    loops forever from it. Found by reachability on the reversed transient graph.
    States that can reach an ending but would need more than
    ``PRACTICALLY_FOREVER_MOVES`` moves on average (near-closed loops whose escape
    needs a long run of unlikely slips) count as trapped too.
    """
    exits = np.asarray(chain.absorb.sum(axis=1)).ravel() > 0
    reached = reaching(chain.transient, exits & active)
    reached &= active
    moves, _ = solve_transient(chain, reached.astype(float), reached, check=False)
    slow = reached & ~(moves < PRACTICALLY_FOREVER_MOVES)
    return reached & ~slow


def solve_transient(chain: Chain, rhs: np.ndarray, mask: np.ndarray, *, transpose: bool = False,
                    tol: float = 1e-8, check: bool = True) -> tuple[np.ndarray, float]:
    """Solve ``(I - T) x = rhs`` (or with ``T`` transposed) on the states in ``mask``.

    ``T`` is ``chain.transient``; states outside ``mask`` are held at zero. ``mask``
    must contain only states that reach absorption (see :func:`reaches_absorption`),
    so the system is non-singular. Returns ``x`` (``(n_states,)`` or
    ``(n_states, k)``) and the largest relative residual.

    The solve is a sparse LU factorisation (SuperLU) in a fill-reducing symmetric
    ordering (minimum degree on the pattern of ``A + A^T``) without row pivoting:
    ``I - T`` restricted to states that reach absorption is a non-singular M-matrix,
    so elimination in any symmetric order needs no pivoting. The factorisation of the
    latest system is kept (until its chain is garbage-collected), so further solves
    on the same chain and mask, transposed or not, cost only triangular solves; the
    chain's matrices must not be changed in place.

    ``check=False`` skips the residual test (used only to detect near-closed loops,
    whose huge expected durations are the point).

    Raises
    ------
    SolverError
        When the residual is above ``tol`` or the answer is not finite.
    """
    from planner.errors import SolverError

    mask = np.asarray(mask, dtype=bool)
    idx = np.flatnonzero(mask)
    rhs = np.asarray(rhs, dtype=float)
    b = rhs[idx]
    if idx.size:
        system, lu = _factorised(chain.transient, mask, idx)
        x_sub = lu.solve(np.asfortranarray(b), trans="T" if transpose else "N")
        applied = system.T @ x_sub if transpose else system @ x_sub
    else:
        x_sub = np.zeros_like(b)
        applied = x_sub
    x_sub = np.asarray(x_sub, dtype=float).reshape(b.shape)
    residual = float(np.max(np.abs(applied - b), initial=0.0) / max(1.0, float(np.max(np.abs(b), initial=0.0))))
    if check and (not np.all(np.isfinite(x_sub)) or not residual <= tol):
        raise SolverError(f"absorbing-chain solve did not converge (relative residual {residual:.2e} > {tol:.0e})")
    x = np.zeros((rhs.shape[0],) + rhs.shape[1:])
    x[idx] = x_sub
    return x, residual


#: The factorisation of the most recent system solved (see :func:`solve_transient`).
_LAST_FACTOR: dict = {}


def _factorised(transient, mask: np.ndarray, idx: np.ndarray):
    """``(I - T[mask, mask])`` in CSC form and its LU factorisation, reused when possible."""
    import hashlib
    import weakref

    from scipy.sparse import identity
    from scipy.sparse.linalg import splu

    from planner.errors import SolverError

    digest = hashlib.blake2b(np.packbits(mask).tobytes(), digest_size=16).digest()
    last = _LAST_FACTOR.get("entry")
    if last is not None and last[0]() is transient and last[1] == digest:
        return last[2], last[3]
    # Free the previous factorisation before making a new one.
    _LAST_FACTOR.clear()
    sub = transient[idx][:, idx]
    system = (identity(idx.size, format="csc") - sub.tocsc()).tocsc()
    try:
        lu = splu(system, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0, options={"SymmetricMode": True})
    except RuntimeError as err:
        raise SolverError(f"absorbing-chain system is singular ({err}); a state in the mask never ends the run") \
            from err

    def forget(ref):
        if _LAST_FACTOR.get("entry", (None,))[0] is ref:
            _LAST_FACTOR.clear()

    _LAST_FACTOR["entry"] = (weakref.ref(transient, forget), digest, system, lu)
    return system, lu


__all__ = [
    "EVENT_BOUNDARY", "EVENT_GOAL", "EVENT_HAZARD", "EVENT_NONE", "FREE", "Chain", "Dynamics", "Model",
    "build_model", "default_penalty_m", "epsilon_greedy", "estimate_bytes", "policy_chain",
]


def site_summary(site, spec, dynamics: Dynamics = Dynamics()) -> dict:
    """Everything ``veerwise check`` reports, as plain data (JSON-ready).

    Rasterises the site at ``spec`` (refusing grids over budget) and estimates the
    model's memory without building it.
    """
    from planner.grid import rasterise

    width, height = site.extent_m
    roles: dict[str, list[str]] = {"hazard": [], "rough": [], "drift": []}
    for zone in site.zones:
        roles[zone.role].append(zone.name)
    grid = rasterise(site, spec)
    lab = grid.label
    penalties, base, notes = resolve_penalties(grid, dynamics)
    return {
        "site": site.name,
        "source": site.source,
        "sha256": site.sha256,
        "frame": {"kind": site.frame.kind, "crs": site.frame.crs,
                  "largest_scale_distortion": site.scale_distortion},
        "extent_m": {"east": round(width, 3), "north": round(height, 3)},
        "centre": {"lat": round(site.centre_lonlat[1], 7), "lon": round(site.centre_lonlat[0], 7)},
        "start": site.start_name,
        "goal": site.goal_name,
        "zones": {
            "hazard": [{"name": z.name, "ends_run": z.ends_run, "buffer_m": z.buffer_m,
                        "penalty_m": float(penalties[i])} for i, z in enumerate(site.hazards)],
            "rough": [{"name": z.name, "cost_factor": z.cost_factor} for z in site.rough],
            "drift": [{"name": z.name, "toward_deg": round(z.toward_deg, 3), "drift_per_m": z.drift_per_m,
                       "spread_per_sqrt_m": z.spread_per_sqrt_m, "chance": z.chance} for z in site.drifts],
        },
        "grid": {
            "cell_m": spec.cell_m, "rows": grid.shape[0], "cols": grid.shape[1], "cells": grid.n_cells,
            "inside_cells": int((lab != OUTSIDE).sum()), "hazard_cells": int((lab >= 0).sum()),
            "active_cells": int((grid.passable() & ~grid.goal).sum()),
            # usable = every cell the vehicle can be in, goal cells included (as the briefing counts)
            "usable_cells": int(grid.passable().sum()), "goal_cells": int(grid.goal.sum()),
            "hazard_overlap": spec.hazard_overlap, "boundary_cover": spec.boundary_cover,
            "max_cells": spec.max_cells,
        },
        "model": {"headings": dynamics.n_actions, "move_m": dynamics.move_length_m(spec.cell_m),
                  "slip": dynamics.slip, "stall": dynamics.stall,
                  "drift_scale": dynamics.drift_scale, "edge": dynamics.edge,
                  "hazard_penalty_m": base, "estimated_bytes": estimate_bytes(grid, dynamics)},
        "warnings": list(site.warnings) + list(grid.warnings) + notes,
    }
