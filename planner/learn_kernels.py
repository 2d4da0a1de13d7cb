"""The learners' numba kernels, their inputs as named records, and a plain-Python reference.

Both training schedules of :mod:`planner.learn` run here: :func:`run_episodes` (runs
from a start cell, as a vehicle would make them) and :func:`run_sweeps` (every
(state, action) block once per sweep). They read the model as one record
(:class:`Sampling`: the model's CSR offsets and its outcomes packed for sampling, see
:func:`sampling_table`), the learning hyper-parameters as another (:class:`Rates`), and
each seed's generator state as a one-element ``uint64`` array that they advance in
place. Event codes are those of :mod:`planner.outcomes`.

Each seed owns a small in-kernel generator (splitmix64) whose 64-bit state comes from
a child of one recorded :class:`numpy.random.SeedSequence` (:func:`seed_states`). This
one file shows every number a seed draws and in which order, which is what
reproducibility rests on; :func:`reference_episodes` and :func:`reference_sweeps` draw
the same numbers in plain Python from the model's own outcome arrays (not the packed
records), for tests on tiny grids.
"""

from __future__ import annotations

from collections import namedtuple

import numba
import numpy as np
from llvmlite import ir
from numba.core import cgutils, types
from numba.extending import intrinsic

from planner import checks
from planner.errors import BudgetError
from planner.outcomes import END_TRUNCATED, EVENT_NONE

#: Kernel codes of the two methods: SARSA bootstraps on the value of a next action drawn
#: from the epsilon-greedy policy, Q-learning on the best next value.
SARSA = 0
QLEARNING = 1
#: ``ends`` code of an episode stopped by the step cap (the Monte Carlo code of a run
#: stopped by its step cap; the other codes are model events).
END_STEP_CAP = END_TRUNCATED

#: One outcome in sampling form: the cumulative probability up to and including it in
#: units of 2**-32 (``threshold``), the next state, or minus the event when the outcome
#: ends the run (``code``: events that end a run are all > ``EVENT_NONE`` = 0), the first
#: record of the next state (``first``, for fetching ahead), reward.
TABLE_DTYPE = np.dtype([("threshold", np.uint32), ("code", np.int32), ("first", np.int32), ("reward", np.float64)])

#: The model as the learning kernels read it: ``offsets`` int64 ``(n_states * n_actions
#: + 1,)`` (the model's CSR offsets), ``records`` ``TABLE_DTYPE`` ``(n_outcomes,)``,
#: ``n_actions``. Built by :func:`sampling_inputs`.
Sampling = namedtuple("Sampling", "offsets records n_actions")
#: The learning hyper-parameters as the kernels read them: ``method`` (``SARSA`` or
#: ``QLEARNING``), ``epsilon``, ``gamma``; episodes: ``step_size`` (constant) unless
#: ``decay`` > 0 (step ``1 / n**decay`` at the ``n``-th update of a pair); sweeps: step
#: ``n ** -decay`` in sweep ``n`` when ``horizon`` is 0, else ``horizon / (horizon + n - 1)``.
#: Built by :func:`rates`.
Rates = namedtuple("Rates", "method epsilon gamma step_size decay horizon")
#: Where episodes begin and when the step cap stops them: ``start`` state, ``corridor``
#: int64 states of exploring starts (empty: always the start), ``share`` of episodes
#: that still begin at the start, ``max_steps``.
Starts = namedtuple("Starts", "start corridor share max_steps")
#: What each episode left, written by :func:`run_episodes`: ``returns`` float64,
#: ``moves`` int32, ``ends`` int16 (the model event, or ``END_STEP_CAP``), one per episode.
Episodes = namedtuple("Episodes", "returns moves ends")


def sampling_table(model) -> np.ndarray:
    """The outcome table packed for the learning kernels, ``TABLE_DTYPE`` ``(n_outcomes,)``.

    One record per outcome, in the model's order, so the kernel touches one small
    record instead of four arrays. Sampling draws a 32-bit integer ``d`` and walks the
    (state, action) block to the first record with ``d < threshold``, stopping at the
    block's last record whatever its threshold: the walk cannot leave the block. Each
    outcome is then drawn with its model probability to within 2**-32.

    Parameters
    ----------
    model : the :class:`planner.model.Model`.

    Returns
    -------
    numpy structured array of ``TABLE_DTYPE``, ``(n_outcomes,)``.

    Raises
    ------
    BudgetError
        When the table has 2**31 or more outcomes (the records index it with int32).
    """
    if model.n_outcomes >= 2**31 - 1:
        raise BudgetError(f"the model has {model.n_outcomes:,} outcomes; the learners handle fewer than 2**31")
    cum = _block_cumsum(model.offsets, model.prob)
    going = model.event == EVENT_NONE
    nxt = np.where(going, model.next_state, 0).astype(np.int64)
    table = np.empty(model.n_outcomes, TABLE_DTYPE)
    table["threshold"] = np.minimum(np.round(cum * 2.0**32), 2.0**32 - 1).astype(np.uint32)
    table["code"] = np.where(going, nxt, -model.event.astype(np.int64))
    table["first"] = np.where(going, model.offsets[nxt * model.n_actions], 0)
    table["reward"] = model.reward
    return table


def sampling_inputs(model) -> Sampling:
    """The model as the learning kernels read it (see :class:`Sampling`)."""
    return Sampling(model.offsets, sampling_table(model), int(model.n_actions))


def rates(method: int, epsilon: float, gamma: float, *, step_size: float = 0.0, decay: float = 0.0,
          horizon: float = 0.0) -> Rates:
    """The hyper-parameters as one :class:`Rates` record, each field of one type.

    ``method`` is ``SARSA`` or ``QLEARNING``; the fields are cast so that numba compiles
    the kernels once whatever mix of ints and floats a caller passes.
    """
    return Rates(int(method), float(epsilon), float(gamma), float(step_size), float(decay), float(horizon))


@numba.njit(cache=True)
def _block_cumsum(offsets, prob):
    """Cumulative probabilities within each block, the last of each set to exactly 1."""
    cum = np.empty(prob.size, np.float64)
    for k in range(offsets.size - 1):
        lo = offsets[k]
        hi = offsets[k + 1]
        total = 0.0
        for j in range(lo, hi):
            total += prob[j]
            cum[j] = total
        if hi > lo:
            cum[hi - 1] = 1.0
    return cum


def seed_states(seed, n_seeds: int) -> tuple[np.random.SeedSequence, np.ndarray]:
    """The root ``SeedSequence`` and one 64-bit kernel generator state per seed.

    ``seed`` may be a ``SeedSequence``, an int, or ``None`` (fresh entropy). Children
    are spawned from a copy (same entropy and spawn key), so passing the same
    sequence twice gives the same streams.

    Parameters
    ----------
    seed : ``numpy.random.SeedSequence``, int >= 0 or ``None``.
    n_seeds : children to spawn.

    Returns
    -------
    (root SeedSequence, uint64 ``(n_seeds,)`` generator states); the kernels advance
    seed ``i``'s state in place through the view ``states[i:i + 1]``.
    """
    if isinstance(seed, np.random.SeedSequence):
        root = seed
    else:
        checks.seed(seed, "seed")
        root = np.random.SeedSequence(None if seed is None else int(seed))
    fresh = np.random.SeedSequence(root.entropy, spawn_key=root.spawn_key, pool_size=root.pool_size)
    states = np.array([child.generate_state(1, np.uint64)[0] for child in fresh.spawn(n_seeds)], dtype=np.uint64)
    return root, states


# ----------------------------------------------------------------------------- kernels

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_S30 = np.uint64(30)
_S27 = np.uint64(27)
_S31 = np.uint64(31)
_S32 = np.uint64(32)
_S11 = np.uint64(11)
_TO_UNIT = 1.0 / 9007199254740992.0  # 2**-53
#: Records of the state just reached that are fetched ahead, every third record.
_AHEAD = 12


@intrinsic
def _prefetch(typingctx, array, index):
    """Hint the CPU to fetch ``array[index]`` into cache (no effect on results)."""
    sig = types.void(array, index)

    def codegen(context, builder, signature, args):
        data = context.make_array(signature.args[0])(context, builder, args[0]).data
        byte_ptr = ir.IntType(8).as_pointer()
        i32 = ir.IntType(32)
        fnty = ir.FunctionType(ir.VoidType(), [byte_ptr, i32, i32, i32])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0i8")
        address = builder.bitcast(builder.gep(data, [args[1]]), byte_ptr)
        # read, keep in all cache levels, data cache
        builder.call(fn, [address, ir.Constant(i32, 0), ir.Constant(i32, 3), ir.Constant(i32, 1)])
        return context.get_dummy_value()

    return sig, codegen


@numba.njit(cache=True, inline="always")
def _next(state):
    """splitmix64: the next generator state and its 64-bit output."""
    # The cast keeps the arithmetic unsigned when a caller hands in a plain integer.
    state = np.uint64(state) + _GOLDEN
    z = state
    z = (z ^ (z >> _S30)) * _MIX1
    z = (z ^ (z >> _S27)) * _MIX2
    return state, z ^ (z >> _S31)


@numba.njit(cache=True, inline="always")
def _uniform(state):
    """The next state and a double uniform on [0, 1) from the output's top 53 bits."""
    state, z = _next(state)
    return state, float(z >> _S11) * _TO_UNIT


@numba.njit(cache=True, inline="always")
def _sample(table, first, last, draw):
    """Index of the outcome a 32-bit ``draw`` selects in the block ``first..last``.

    Walks to the first record whose threshold exceeds the draw, and stops at ``last``
    whatever its threshold, so it can never leave the block.
    """
    j = first
    while j < last and draw >= table[j].threshold:
        j += 1
    return j


@numba.njit(cache=True, inline="always")
def _explore(greedy, n_actions, epsilon, state):
    """Epsilon-greedy: uniform over all actions with probability epsilon."""
    state, u = _uniform(state)
    if u < epsilon:
        # u / epsilon is itself uniform on [0, 1): no second draw needed.
        return state, min(int(u / epsilon * n_actions), n_actions - 1)
    return state, greedy


@numba.njit(cache=True, inline="always")
def _greedy(q, base, n_actions, state):
    """Best value of the Q row at ``base`` (``np.uint64``) and a greedy action, exact ties at random.

    Returns (generator state, action, best value). The common case (one best action)
    is found without data-dependent branches; only a tie costs a draw, which picks
    uniformly among the tied actions. Indices are unsigned: they need no negative-index
    wraparound check, which on the sweeps' scattered reads costs about a tenth of the loop.
    """
    best = q[base]
    a = 0
    for b in range(1, n_actions):
        v = q[base + np.uint64(b)]
        a = b if v > best else a
        best = max(best, v)
    ties = 0
    for b in range(n_actions):
        ties += q[base + np.uint64(b)] == best
    if ties > 1:
        state, u = _uniform(state)
        pick = min(int(u * ties), ties - 1)
        for b in range(n_actions):
            if q[base + np.uint64(b)] == best:
                if pick == 0:
                    a = b
                    break
                pick -= 1
    return state, a, best


@numba.njit(cache=True, nogil=True)
def run_episodes(model, rates, starts, q, visits, rng, out):
    """All episodes of one seed (one per entry of ``out.returns``), updating ``q`` in place.

    ``model`` a :class:`Sampling`, ``rates`` a :class:`Rates`, ``starts`` a
    :class:`Starts`; ``q`` float64 flat (``s * n_actions + a``); ``visits`` int64, the
    updates made of each pair so far (used when ``rates.decay`` > 0, else may be empty);
    ``rng`` uint64 ``(1,)``, the seed's generator state, advanced in place; ``out`` an
    :class:`Episodes` of per-episode arrays, written. Returns the number of steps taken.
    """
    offsets, table, n_actions = model.offsets, model.records, model.n_actions
    method, epsilon, gamma = rates.method, rates.epsilon, rates.gamma
    step_size, decay = rates.step_size, rates.decay
    corridor, max_steps, start_share = starts.corridor, starts.max_steps, starts.share
    returns, moves, ends = out.returns, out.moves, out.ends
    state = rng[0]
    total = 0
    n_corridor = corridor.size
    n_records = table.size
    for ep in range(returns.size):
        s = starts.start
        if n_corridor > 0:
            state, u = _uniform(state)
            if u >= start_share:
                state, u = _uniform(state)
                s = corridor[min(int(u * n_corridor), n_corridor - 1)]
        base = s * n_actions
        state, g, best = _greedy(q, np.uint64(base), n_actions, state)
        state, a = _explore(g, n_actions, epsilon, state)
        ret = 0.0
        disc = 1.0
        t = 0
        end = END_STEP_CAP
        while True:
            k = base + a
            j = offsets[k]
            last = offsets[k + 1] - 1
            state, z = _next(state)
            j = _sample(table, j, last, np.uint32(z >> _S32))
            rec = table[j]
            r = rec.reward
            code = rec.code
            ret += disc * r
            disc *= gamma
            t += 1
            if decay > 0.0:
                visits[k] += 1
                alpha = visits[k] ** (-decay)
            else:
                alpha = step_size
            if code < 0:
                # the outcome ends the run: code is minus its event
                q[k] += alpha * (r - q[k])
                end = -code
                break
            base2 = code * n_actions
            # The next state's offsets and outcome records are needed one step from now:
            # start fetching them while its Q row is read.
            _prefetch(offsets, base2)
            _prefetch(offsets, base2 + n_actions)
            first = rec.first
            for i in range(_AHEAD):
                _prefetch(table, min(first + 3 * i, n_records - 1))
            state, g2, best2 = _greedy(q, np.uint64(base2), n_actions, state)
            if method == SARSA:
                state, a2 = _explore(g2, n_actions, epsilon, state)
                q[k] += alpha * (r + gamma * q[base2 + a2] - q[k])
            else:
                q[k] += alpha * (r + gamma * best2 - q[k])
                if base2 == base:
                    # The update touched the row the next action is chosen from.
                    state, g2, best2 = _greedy(q, np.uint64(base2), n_actions, state)
                state, a2 = _explore(g2, n_actions, epsilon, state)
            if t >= max_steps:
                break
            base = base2
            a = a2
        returns[ep] = ret
        moves[ep] = t
        ends[ep] = end
        total += t
    rng[0] = state
    return total


@numba.njit(cache=True, nogil=True)
def run_sweeps(model, rates, order, q, rng, done, n_sweeps):
    """Sweeps ``done + 1`` to ``done + n_sweeps`` over the (state, action) blocks in ``order``.

    ``model`` a :class:`Sampling`, ``rates`` a :class:`Rates`, ``order`` int64 flat
    block indices, ``q`` float64 flat (updated in place), ``rng`` uint64 ``(1,)`` (the
    seed's generator state, advanced in place). One transition sampled from the model
    per block and sweep, one TD update of ``q``.

    Q-learning bootstraps on the best next value; SARSA on the value of a next action
    drawn from the current epsilon-greedy policy. Every block is updated once per
    sweep, so the ``n``-th update of every block falls in sweep ``n`` and its step size
    is one number per sweep: ``n ** -decay`` (a polynomial schedule, ``decay`` in
    (0.5, 1]) when ``horizon`` is 0, else ``horizon / (horizon + n - 1)``. Indices are
    unsigned (see :func:`_greedy`).
    """
    offsets, table, n_actions = model.offsets, model.records, model.n_actions
    method, epsilon, gamma = rates.method, rates.epsilon, rates.gamma
    decay, horizon = rates.decay, rates.horizon
    state = rng[0]
    n_a = np.uint64(n_actions)
    one = np.uint64(1)
    for sweep in range(done + 1, done + n_sweeps + 1):
        alpha = horizon / (horizon + sweep - 1.0) if horizon > 0.0 else float(sweep) ** (-decay)
        for i in range(order.size):
            k = np.uint64(order[np.uint64(i)])
            state, z = _next(state)
            draw = np.uint32(z >> _S32)
            # the cumulative walk of _sample, on unsigned indices
            j = np.uint64(offsets[k])
            last = np.uint64(offsets[k + one]) - one
            while j < last and draw >= table[j].threshold:
                j += one
            rec = table[j]
            r = rec.reward
            code = rec.code
            if code < 0:
                # the outcome ends the run
                q[k] += alpha * (r - q[k])
                continue
            base2 = np.uint64(code) * n_a
            state, g2, best2 = _greedy(q, base2, n_actions, state)
            if method == SARSA:
                state, a2 = _explore(g2, n_actions, epsilon, state)
                q[k] += alpha * (r + gamma * q[base2 + np.uint64(a2)] - q[k])
            else:
                q[k] += alpha * (r + gamma * best2 - q[k])
    rng[0] = state


# ----------------------------------------------------------------------------- reference

_MASK64 = (1 << 64) - 1


class _ReferenceDraws:
    """splitmix64 on Python integers: the same stream as the kernels' generator."""

    def __init__(self, state: int):
        self.state = int(state)

    def bits(self) -> int:
        self.state = (self.state + 0x9E3779B97F4A7C15) & _MASK64
        z = self.state
        z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK64
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK64
        return z ^ (z >> 31)

    def uniform(self) -> float:
        return (self.bits() >> 11) / 2.0**53


def _reference_greedy(row: list[float], draws: _ReferenceDraws) -> tuple[int, float]:
    """A best action of ``row`` and its value; among exact ties, one drawn uniformly."""
    best = max(row)
    tied = [b for b, v in enumerate(row) if v == best]
    if len(tied) == 1:
        return tied[0], best
    return tied[min(int(draws.uniform() * len(tied)), len(tied) - 1)], best


def _reference_explore(greedy: int, n_actions: int, epsilon: float, draws: _ReferenceDraws) -> int:
    u = draws.uniform()
    return min(int(u / epsilon * n_actions), n_actions - 1) if u < epsilon else greedy


def _reference_outcome(table, k: int, draws: _ReferenceDraws) -> tuple[float, int | None, int]:
    """One outcome of block ``k`` drawn from the model's own arrays: (reward, next state or None, event)."""
    lo, hi = int(table.offsets[k]), int(table.offsets[k + 1])
    draw = draws.bits() >> 32
    total, pick = 0.0, hi - 1
    for j in range(lo, hi - 1):
        total += float(table.prob[j])
        if draw < min(round(total * 2.0**32), 2**32 - 1):
            pick = j
            break
    event = int(table.event[pick])
    return float(table.reward[pick]), (int(table.next_state[pick]) if event == EVENT_NONE else None), event


def reference_episodes(table, n_actions: int, rates: Rates, starts: Starts, q, visits, rng, out) -> int:
    """:func:`run_episodes` in plain Python, reading the model's outcome arrays.

    ``table`` is the model's :class:`planner.outcomes.Table` (``model.table()``); the
    other arguments are those of :func:`run_episodes` and are updated the same way. Draws
    the same numbers in the same order, so on the same inputs it leaves the same bits.
    """
    draws = _ReferenceDraws(rng[0])
    total = 0
    for ep in range(out.returns.size):
        s = int(starts.start)
        if starts.corridor.size and draws.uniform() >= starts.share:
            s = int(starts.corridor[min(int(draws.uniform() * starts.corridor.size), starts.corridor.size - 1)])
        a = _reference_explore(_reference_greedy(q[s * n_actions:(s + 1) * n_actions].tolist(), draws)[0],
                               n_actions, rates.epsilon, draws)
        ret, disc, t, end = 0.0, 1.0, 0, END_STEP_CAP
        while True:
            k = s * n_actions + a
            r, nxt, event = _reference_outcome(table, k, draws)
            ret += disc * r
            disc *= rates.gamma
            t += 1
            if rates.decay > 0.0:
                visits[k] += 1
                alpha = int(visits[k]) ** (-rates.decay)
            else:
                alpha = rates.step_size
            if nxt is None:
                q[k] += alpha * (r - q[k])
                end = event
                break
            row = slice(nxt * n_actions, (nxt + 1) * n_actions)
            g2, best2 = _reference_greedy(q[row].tolist(), draws)
            if rates.method == SARSA:
                a2 = _reference_explore(g2, n_actions, rates.epsilon, draws)
                q[k] += alpha * (r + rates.gamma * q[nxt * n_actions + a2] - q[k])
            else:
                q[k] += alpha * (r + rates.gamma * best2 - q[k])
                if nxt == s:
                    g2, best2 = _reference_greedy(q[row].tolist(), draws)
                a2 = _reference_explore(g2, n_actions, rates.epsilon, draws)
            if t >= starts.max_steps:
                break
            s, a = nxt, a2
        out.returns[ep], out.moves[ep], out.ends[ep] = ret, t, end
        total += t
    rng[0] = draws.state
    return total


def reference_sweeps(table, n_actions: int, rates: Rates, order, q, rng, done: int, n_sweeps: int) -> None:
    """:func:`run_sweeps` in plain Python, reading the model's outcome arrays (see :func:`reference_episodes`)."""
    draws = _ReferenceDraws(rng[0])
    for sweep in range(done + 1, done + n_sweeps + 1):
        if rates.horizon > 0.0:
            alpha = rates.horizon / (rates.horizon + sweep - 1.0)
        else:
            alpha = float(sweep) ** (-rates.decay)
        for k in order.tolist():
            r, nxt, _ = _reference_outcome(table, k, draws)
            if nxt is None:
                q[k] += alpha * (r - q[k])
                continue
            g2, best2 = _reference_greedy(q[nxt * n_actions:(nxt + 1) * n_actions].tolist(), draws)
            if rates.method == SARSA:
                a2 = _reference_explore(g2, n_actions, rates.epsilon, draws)
                q[k] += alpha * (r + rates.gamma * q[nxt * n_actions + a2] - q[k])
            else:
                q[k] += alpha * (r + rates.gamma * best2 - q[k])
    rng[0] = draws.state
