"""Learners: SARSA gives the cautious Q, Q-learning the shortest Q.

This stage owns tabular temporal-difference learning over the outcome table of a
:class:`~planner.model.Model`: the settings (:class:`LearnSettings`), the Q
initialisation (:func:`heuristic_q`, from a cheapest-path cost-to-go), the numba
kernels that run whole training runs per seed, and the tie sets of a learned Q
(:func:`learned_ties`, from the seeds' spread) from which the delivered policy is
picked by safety (:func:`planner.exact.safest_among`).

The kernels sample outcomes straight from the model's flat CSR arrays (a cumulative
walk inside each (state, action) block that cannot fall off the end), so learning and
the exact methods of :mod:`planner.exact` see one and the same model. Each seed owns a
small in-kernel generator (splitmix64) whose 64-bit state comes from a child of one
recorded :class:`numpy.random.SeedSequence`; seeds are independent, so the results do
not depend on how many threads run them.

The module is longer than most on purpose: the kernels of both schedules sit beside the
generator, sampler and greedy helpers they share, so one file shows every number a seed
draws and in which order, which is what reproducibility rests on.
"""

from __future__ import annotations

import math
import os
import threading
import time
from concurrent.futures import ThreadPoolExecutor, wait
from dataclasses import dataclass, field

import numba
import numpy as np
from llvmlite import ir
from numba.core import cgutils, types
from numba.extending import intrinsic

from planner.errors import SettingsError, SiteError
from planner.model import EVENT_GOAL, EVENT_NONE, Model

#: ``ends`` code of an episode stopped by the step cap (other codes are model events).
END_STEP_CAP = -1
#: Method names accepted by :func:`train`, and their kernel codes.
METHODS = {"sarsa": 0, "qlearning": 1}
#: Without ``max_steps``, an episode may last this many times the fewest moves from
#: the start to the goal ...
STEP_CAP_FACTOR = 10
#: ... and never fewer than this many moves.
MIN_STEP_CAP = 100
#: Exploring starts draw from cells whose cheapest cost from the start plus cheapest
#: cost to the goal is at most ``1 + CORRIDOR_MARGIN`` times the start's cost to go.
CORRIDOR_MARGIN = 0.5
#: With exploring starts, the share of episodes that still begin at the start.
START_SHARE = 0.5
#: Each seed's episodes run in about this many kernel calls, between which progress
#: is reported and a stop request is honoured.
PROGRESS_CHUNKS = 50
#: How often, at most, the progress callback is called.
PROGRESS_SECONDS = 0.2
#: Training schedules (see :class:`LearnSettings`).
SCHEDULES = ("episodes", "sweeps")
#: Largest sweep budget accepted.
MAX_SWEEPS = 1_000_000
#: Step-size exponent of the sweeps schedule without ``step_decay``: ``alpha_n = n ** -0.7``
#: (polynomial rates; Even-Dar & Mansour, "Learning rates for Q-learning", JMLR 5, 2003).
#: Measured on the ground-robot demo yard: 0.7 met the risk verdict in 48 sweeps, a
#: rescaled linear schedule ``H / (H + n - 1)`` needed 256.
SWEEP_DECAY = 0.7
#: First sweep count at which the stopping rule is checked; later checks double it ...
FIRST_CHECK_SWEEPS = 4
#: ... up to this many sweeps, and from there grow by ``CHECK_GROWTH`` (see :func:`check_marks`).
CHECK_DOUBLING_UNTIL = 512
CHECK_GROWTH = 1.25
#: Step-size horizon of SARSA in sweeps: ``alpha_n = H / (H + n - 1)`` in sweep ``n``
#: (a rescaled linear schedule). SARSA's target carries the value of a next action drawn
#: from the epsilon-greedy policy, whose spread near a hazard is hundreds of metres, and
#: the greedy part of that draw is the maximum of noisy estimates: steps that shrink
#: fast (``n ** -0.7``) freeze the optimism of the first noisy sweeps into Q, steps that
#: stay large forget it. Measured on the ground-robot demo yard (8 seeds) from the exact
#: reference Q itself: with ``n ** -0.7`` 512 sweeps drift to a route with P(incident)
#: 18 % (reference 0.39 %); with ``H = 100`` 2,048 sweeps stay near it (0.47 %). From
#: the heuristic start ``H = 100`` met the risk verdict after about 2,000 sweeps, where
#: ``H = 10`` and ``300`` had not after 1,024 and 2,048 (``40``: 0.47 % after 1,024).
SARSA_SWEEP_HORIZON = 100.0


@dataclass(frozen=True)
class LearnSettings:
    """Settings of one learner (shared by SARSA and Q-learning).

    Parameters
    ----------
    epsilon : exploration of the epsilon-greedy behaviour policy, in [0, 1]; for
        SARSA it is also the execution noise the cautious policy is trained for.
    step_size : constant step size alpha in (0, 1]; unused when ``step_decay`` is set.
    step_decay : ``None`` (constant step) or ``w`` in (0.5, 1]: the step size of the
        ``n``-th update of (s, a) is ``1 / n**w``.
    gamma : discount in (0, 1]; 1 (default) means none.
    episodes : episodes per seed (>= 1). The default suits grids of a few hundred
        cells; with slip or drift, exact agreement also needs a decaying step size
        (``step_decay``), since a constant step keeps Q as noisy as the outcomes.
    max_steps : episode step cap; ``None`` derives it as ``STEP_CAP_FACTOR`` times
        the fewest moves from the start to the goal in the model, at least
        ``MIN_STEP_CAP``. An episode stopped by the cap is not terminal: its last
        update still bootstraps.
    n_seeds : independent runs (>= 1), each from its own child seed.
    start_mode : ``"start"`` (every episode begins at the start) or ``"explore"``
        (with probability ``START_SHARE`` at the start, otherwise at a cell drawn
        uniformly from the start-goal corridor; see :func:`corridor_states`).
    q_init : ``"heuristic"`` (:func:`heuristic_q`) or ``"zeros"``.
    schedule : ``"episodes"`` (runs from a start cell, as a vehicle would fly them) or
        ``"sweeps"`` (synchronous: every reachable state-action pair is updated once per
        sweep with one transition sampled from the model, pairs in order of their cost
        to go, nearest the goal first; the step size of the ``n``-th update of a pair
        is ``n ** -w``, ``w`` = ``step_decay`` or ``SWEEP_DECAY``).
    max_sweeps : with ``"sweeps"``, the update budget in sweeps; training checks its
        stopping rule (see :func:`train`) at the sweep counts of :func:`check_marks` and stops there
        when it is met.
    sweep_horizon : with ``"sweeps"``, ``None`` (step ``n ** -w`` in sweep ``n``, see
        ``schedule``) or ``H >= 1``: step ``H / (H + n - 1)`` (rescaled linear; ``plan``
        trains SARSA with ``SARSA_SWEEP_HORIZON``).
    """

    epsilon: float = 0.1
    step_size: float = 0.1
    step_decay: float | None = None
    gamma: float = 1.0
    episodes: int = 20_000
    max_steps: int | None = None
    n_seeds: int = 8
    start_mode: str = "start"
    q_init: str = "heuristic"
    schedule: str = "episodes"
    max_sweeps: int = 512
    sweep_horizon: float | None = None

    def __post_init__(self):
        if not (_is_real(self.epsilon) and 0.0 <= self.epsilon <= 1.0):
            raise SettingsError(f"--epsilon must be a number in [0, 1], got {self.epsilon!r}")
        if not (_is_real(self.step_size) and 0.0 < self.step_size <= 1.0):
            raise SettingsError(f"--step-size must be a number in (0, 1], got {self.step_size!r}")
        if self.step_decay is not None and not (_is_real(self.step_decay) and 0.5 < self.step_decay <= 1.0):
            raise SettingsError(f"--step-decay must be a number in (0.5, 1] (or unset), got {self.step_decay!r}")
        if not (_is_real(self.gamma) and 0.0 < self.gamma <= 1.0):
            raise SettingsError(f"--gamma must be a number in (0, 1], got {self.gamma!r}")
        if not (_is_whole(self.episodes) and self.episodes >= 1):
            raise SettingsError(f"--episodes must be a whole number >= 1, got {self.episodes!r}")
        if self.max_steps is not None and not (_is_whole(self.max_steps) and self.max_steps >= 1):
            raise SettingsError(f"--max-steps must be a whole number >= 1 (or unset), got {self.max_steps!r}")
        if not (_is_whole(self.n_seeds) and self.n_seeds >= 1):
            raise SettingsError(f"--training-runs must be a whole number >= 1, got {self.n_seeds!r}")
        if self.start_mode not in ("start", "explore"):
            raise SettingsError(f"--start-mode must be 'start' or 'explore', got {self.start_mode!r}")
        if self.q_init not in ("heuristic", "zeros"):
            raise SettingsError(f"--q-init must be 'heuristic' or 'zeros', got {self.q_init!r}")
        if self.schedule not in SCHEDULES:
            raise SettingsError(f"LearnSettings.schedule must be one of {', '.join(SCHEDULES)}, got {self.schedule!r}")
        if not (_is_whole(self.max_sweeps) and 1 <= self.max_sweeps <= MAX_SWEEPS):
            raise SettingsError(f"LearnSettings.max_sweeps must be a whole number in [1, {MAX_SWEEPS}], "
                                f"got {self.max_sweeps!r}")
        if self.sweep_horizon is not None and not (_is_real(self.sweep_horizon) and self.sweep_horizon >= 1.0):
            raise SettingsError(f"LearnSettings.sweep_horizon must be a number >= 1 (or unset), "
                                f"got {self.sweep_horizon!r}")


def _is_real(value) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool) \
        and math.isfinite(value)


def _is_whole(value) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, bool)


@dataclass(frozen=True)
class Learned:
    """What a training run produced (parameters in ``settings``, learned arrays beside).

    Attributes
    ----------
    method : ``"sarsa"`` or ``"qlearning"``.
    settings : the :class:`LearnSettings` used.
    q : float64 ``(n_seeds, n_states, n_actions)``; rows of inactive states stay at
        their initial value (0 with either initialisation).
    q_mean : float64 ``(n_states, n_actions)``, mean over seeds (the consensus Q).
    returns : float64 ``(n_seeds, episodes)``, discounted return of each episode from
        the cell it began in (the online return, exploration included).
    moves : int32 ``(n_seeds, episodes)``, moves made in each episode.
    ends : int16 ``(n_seeds, episodes)``, the model event that ended each episode
        (1 goal, 2 boundary, ``3 + h`` ending hazard ``h``) or ``END_STEP_CAP``.
    max_steps : the episode step cap actually used.
    seed_entropy : entropy of the root ``SeedSequence`` (record it to reproduce); an
        int, or a tuple of ints when the sequence was made from several.
    seed_spawn_key : spawn key of the ``SeedSequence`` passed in (empty for a root).
    steps_total : environment steps over all seeds and episodes.
    seconds : wall time of the training kernels (tables prepared beforehand excluded).
    check_updates : int64 ``(n_checks,)``, updates made over all seeds at each check
        of the stopping rule (sweeps schedule; empty otherwise).
    check_p_incident : float64 ``(n_checks,)``, the consensus policy's exact
        P(incident) at each check, as the stopping rule reported it (NaN without one).
    check_value : float64 ``(n_seeds, n_checks)``, each seed's greedy value at the
        start (``max_a Q``) at each check: the seed bands of the learning curve.
    stopped_by_rule : whether the stopping rule ended training before the budget.
    n_sweeps : sweeps made per seed (sweeps schedule; 0 otherwise).
    """

    method: str
    settings: LearnSettings
    q: np.ndarray
    q_mean: np.ndarray
    returns: np.ndarray
    moves: np.ndarray
    ends: np.ndarray
    max_steps: int
    seed_entropy: int | tuple[int, ...]
    seed_spawn_key: tuple[int, ...]
    steps_total: int
    seconds: float
    check_updates: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    check_p_incident: np.ndarray = field(default_factory=lambda: np.zeros(0))
    check_value: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    stopped_by_rule: bool = False
    n_sweeps: int = 0

    @property
    def n_seeds(self) -> int:
        """Independent training runs."""
        return int(self.q.shape[0])

    @property
    def steps_per_second(self) -> float:
        """Training moves per second of wall-clock time, all seeds together."""
        return self.steps_total / self.seconds if self.seconds > 0 else float("inf")


# ----------------------------------------------------------------------------- cheapest paths on the model


def _outcome_graph(model: Model):
    """Directed graph of the model: an edge per possible continuing or goal outcome.

    Node ``n_states`` stands for "goal reached". Edge weights are the outcome's cost
    (minus its reward); parallel edges keep their cheapest weight.
    """
    from scipy.sparse import csr_matrix

    n_s, n_a = model.n_states, model.n_actions
    counts = np.diff(model.offsets)
    src = np.repeat(np.arange(n_s * n_a, dtype=np.int64), counts) // n_a
    going = model.event == EVENT_NONE
    reached = model.event == EVENT_GOAL
    keep = (going | reached) & (model.next_state != src)
    dst = np.where(reached, n_s, model.next_state.astype(np.int64))[keep]
    src = src[keep]
    cost = np.maximum(-model.reward[keep], 1e-12)
    order = np.lexsort((cost, dst, src))
    src, dst, cost = src[order], dst[order], cost[order]
    first = np.ones(src.size, dtype=bool)
    first[1:] = (src[1:] != src[:-1]) | (dst[1:] != dst[:-1])
    return csr_matrix((cost[first], (src[first], dst[first])), shape=(n_s + 1, n_s + 1))


def model_cost_to_go(model: Model) -> np.ndarray:
    """Cheapest cost to the goal from each state if every move had its best outcome.

    Dijkstra on the model's outcome graph (every outcome with positive probability is
    an edge, weighted by its cost). This is the deterministic shortest-path cost of the
    model's own rewards: no run that reaches the goal costs less.

    Parameters
    ----------
    model : the model.

    Returns
    -------
    float64 ``(n_states,)``: 0 on goal cells, ``inf`` where the goal is unreachable and
    on the other inactive cells (hazards that end the run, outside the boundary).

    Examples
    --------
    >>> import numpy as np
    >>> from planner.grid import grid_from_arrays
    >>> from planner.model import Dynamics, build_model
    >>> goal = np.zeros((1, 4), bool); goal[0, 3] = True
    >>> m = build_model(grid_from_arrays(np.full((1, 4), -1), goal=goal, start=(0, 0)),
    ...                 Dynamics(n_actions=4, slip=0.0, edge="wall", step_cost="move"))
    >>> model_cost_to_go(m)[:3].tolist()
    [3.0, 2.0, 1.0]
    """
    from scipy.sparse.csgraph import dijkstra

    graph = _outcome_graph(model)
    cost = dijkstra(graph.T.tocsr(), directed=True, indices=model.n_states)[: model.n_states]
    cost[~model.active] = np.inf
    cost[model.goal] = 0.0
    return cost


def fewest_moves(model: Model) -> float:
    """Fewest moves from the start to the goal if every move had its best outcome.

    Parameters
    ----------
    model : the model.

    Returns
    -------
    float, ``inf`` when no sequence of outcomes reaches the goal.
    """
    from scipy.sparse.csgraph import dijkstra

    graph = _outcome_graph(model)
    return float(dijkstra(graph, directed=True, indices=model.start, unweighted=True)[model.n_states])


def corridor_states(model: Model, cost_to_go: np.ndarray | None = None, margin: float = CORRIDOR_MARGIN) -> np.ndarray:
    """States near the start-goal corridor, the pool of exploring starts.

    A state qualifies when it is active and its cheapest cost from the start plus its
    cheapest cost to the goal (both on the outcome graph, see
    :func:`model_cost_to_go`) is at most ``(1 + margin)`` times the start's cost to go:
    the cells a route at most ``margin`` longer than the cheapest could pass through.

    Parameters
    ----------
    model : the model.
    cost_to_go : float ``(n_states,)`` in the model's reward units; default
        :func:`model_cost_to_go`.
    margin : allowed excess over the cheapest route, as a fraction (>= 0).

    Returns
    -------
    int64 array of sorted state indices; the start is always among them.
    """
    from scipy.sparse.csgraph import dijkstra

    if not (_is_real(margin) and margin >= 0):
        raise SettingsError(f"corridor margin must be a number >= 0, got {margin!r}")
    to_go = model_cost_to_go(model) if cost_to_go is None else _checked_cost_to_go(model, cost_to_go)
    from_start = dijkstra(_outcome_graph(model), directed=True, indices=model.start)[: model.n_states]
    budget = (1.0 + margin) * to_go[model.start]
    ok = model.active & np.isfinite(to_go) & np.isfinite(from_start) & (from_start + to_go <= budget * (1 + 1e-12))
    ok[model.start] = True
    return np.flatnonzero(ok).astype(np.int64)


def _checked_cost_to_go(model: Model, cost_to_go) -> np.ndarray:
    cost = np.asarray(cost_to_go, dtype=np.float64).ravel()
    if cost.size != model.n_states:
        raise SettingsError(f"cost_to_go has {cost.size} entries, the model has {model.n_states} states")
    if np.any(np.isnan(cost)) or np.any(cost < 0):
        raise SettingsError("cost_to_go must be >= 0 (inf where the goal is unreachable), with no NaN")
    return cost


def heuristic_q(model: Model, cost_to_go) -> np.ndarray:
    """Initial Q from a deterministic cost-to-go: one exact step, then the heuristic.

    ``Q(s, a) = sum_o p_o (r_o + [o continues] * (-cost_to_go[next_o]))``: an outcome
    that ends the run contributes only its reward; a continuing outcome into a cell
    whose cost to go is ``inf`` (the goal is unreachable from there) is valued at minus
    the model's boundary penalty, the cost the model puts on giving up a run. The
    heuristic is undiscounted whatever ``gamma`` the learner uses.

    Parameters
    ----------
    model : the model.
    cost_to_go : float ``(n_states,)`` or grid-shaped, in the model's reward units
        (metres-equivalent), e.g. ``planner.grid.cost_to_goal(grid, n_actions)`` or
        :func:`model_cost_to_go`.

    Returns
    -------
    float64 ``(n_states, n_actions)``; rows of inactive states are 0.
    """
    cost = _checked_cost_to_go(model, cost_to_go)
    n_s, n_a = model.n_states, model.n_actions
    counts = np.diff(model.offsets)
    pair = np.repeat(np.arange(n_s * n_a, dtype=np.int64), counts)
    going = model.event == EVENT_NONE
    after = cost[np.where(going, model.next_state, 0)]
    after = np.where(np.isfinite(after), -after, -model.boundary_penalty_m)
    value = model.prob * (model.reward + np.where(going, after, 0.0))
    return np.bincount(pair, weights=value, minlength=n_s * n_a).reshape(n_s, n_a)


# ----------------------------------------------------------------------------- consensus policy


def greedy_actions(q: np.ndarray, rng: np.random.Generator | None = None) -> np.ndarray:
    """The greedy action of every state by action order, int64 ``(n_states,)``.

    Without ``rng``, exact ties go to the lowest action index; with ``rng``, uniformly
    among the tied actions. Neither is how the product delivers a policy: ties there
    go to the safest action (:func:`planner.exact.safest_among`). This is the plain
    rule, for tables known to have no ties and for showing what a tie-break by action
    order would report.

    Parameters
    ----------
    q : float ``(n_states, n_actions)``, e.g. ``Learned.q_mean``.
    rng : optional generator for random tie-breaking.

    Returns
    -------
    int64 ``(n_states,)``.
    """
    q = np.asarray(q, dtype=np.float64)
    if q.ndim != 2:
        raise SettingsError(f"q must be (n_states, n_actions), got shape {q.shape}")
    if rng is None:
        return np.argmax(q, axis=1).astype(np.int64)
    tied = q == q.max(axis=1, keepdims=True)
    keys = np.where(tied, rng.random(q.shape), -1.0)
    return np.argmax(keys, axis=1).astype(np.int64)


def learned_ties(learned, tie_m: float = 0.0, *, z: float = 2.0, max_slack_m: float | None = None) -> np.ndarray:
    """Actions a learned Q cannot tell apart from its best: the tie set of a learned policy.

    An action is tied with the best when its mean Q over the seeds is within ``tie_m``
    plus ``z`` standard errors of the difference (the seeds' spread; common practice:
    two standard errors) of the best mean; with one seed, within ``tie_m`` (and exact
    ties). The delivered policy picks among them by safety
    (:func:`planner.exact.safest_among`), never by action order.

    Parameters
    ----------
    learned : a :class:`Learned`, or its per-seed Q, float ``(n_seeds, n_states, n_actions)``.
    tie_m : tolerance in metres-equivalent (>= 0).
    z : how many standard errors of the difference count as "cannot tell apart".
    max_slack_m : cap on the slack (``plan`` allows the seeds' spread to add at most 5 %
        of the cheapest move, so that the safety rule cannot pick moves that go round in
        a loop on a barely trained Q).

    Returns
    -------
    bool ``(n_states, n_actions)``; every row has at least one True.
    """
    q = np.asarray(getattr(learned, "q", learned), dtype=np.float64)
    mean = q.mean(axis=0)
    n = q.shape[0]
    se = q.std(axis=0, ddof=1) / math.sqrt(n) if n > 1 else np.zeros_like(mean)
    best = mean.max(axis=1, keepdims=True)
    se_best = np.where(mean == best, se, 0.0).max(axis=1, keepdims=True)
    slack = float(tie_m) + z * np.sqrt(se * se + se_best * se_best)
    if max_slack_m is not None:
        slack = np.minimum(slack, max_slack_m)
    return (mean >= best - slack) | (mean == best)


# ----------------------------------------------------------------------------- training


#: One outcome in sampling form: the cumulative probability up to and including it in
#: units of 2**-32 (``threshold``), the next state or minus the event that ends the run
#: (``code``), the first record of the next state (``first``, for fetching ahead), reward.
TABLE_DTYPE = np.dtype([("threshold", np.uint32), ("code", np.int32), ("first", np.int32), ("reward", np.float64)])


def sampling_table(model: Model) -> np.ndarray:
    """The outcome table packed for the learning kernels, ``TABLE_DTYPE`` ``(n_outcomes,)``.

    One record per outcome, in the model's order, so the kernel touches one small
    record instead of four arrays. Sampling draws a 32-bit integer ``d`` and walks the
    (state, action) block to the first record with ``d < threshold``, stopping at the
    block's last record whatever its threshold: the walk cannot leave the block. Each
    outcome is then drawn with its model probability to within 2**-32.

    Parameters
    ----------
    model : the model.

    Returns
    -------
    numpy structured array of ``TABLE_DTYPE``, ``(n_outcomes,)``.

    Raises
    ------
    BudgetError
        When the table has 2**31 or more outcomes (the records index it with int32).
    """
    from planner.errors import BudgetError

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
    (root SeedSequence, uint64 ``(n_seeds,)`` generator states)
    """
    if isinstance(seed, np.random.SeedSequence):
        root = seed
    elif seed is None or (isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and seed >= 0):
        root = np.random.SeedSequence(seed)
    else:
        raise SettingsError(f"--root-seed must be a whole number >= 0, got {seed!r}")
    fresh = np.random.SeedSequence(root.entropy, spawn_key=root.spawn_key, pool_size=root.pool_size)
    states = np.array([child.generate_state(1, np.uint64)[0] for child in fresh.spawn(n_seeds)], dtype=np.uint64)
    return root, states


def _entropy(root: np.random.SeedSequence):
    entropy = root.entropy
    return int(entropy) if isinstance(entropy, (int, np.integer)) else tuple(int(e) for e in entropy)


def train(model: Model, method: str, settings: LearnSettings = LearnSettings(), *, seed=None,
          cost_to_go=None, n_jobs: int | None = None, progress=None, stop_rule=None) -> Learned:
    """Train SARSA (``"sarsa"``, cautious) or Q-learning (``"qlearning"``, shortest).

    Each seed runs ``settings.episodes`` episodes of epsilon-greedy behaviour (greedy
    ties broken at random) on the model's outcome table, from its own child of
    ``seed``. Seeds run in parallel threads (the kernel releases the GIL); each seed is
    independent, so the arrays do not depend on ``n_jobs``.

    Parameters
    ----------
    model : the model to learn on.
    method : ``"sarsa"`` or ``"qlearning"``.
    settings : :class:`LearnSettings`.
    seed : ``numpy.random.SeedSequence``, int or ``None``; its entropy is recorded.
    cost_to_go : float ``(n_states,)`` for the heuristic initialisation and the
        exploring-start corridor; default :func:`model_cost_to_go`.
    n_jobs : threads; default the usable cores (at most ``n_seeds``).
    progress : optional ``callable(done, total)``, called from the calling thread about
        every ``PROGRESS_SECONDS`` with episodes (or sweeps) finished and in all (over
        all seeds). A ``KeyboardInterrupt`` while training stops the workers after their
        current chunk and is re-raised.
    stop_rule : sweeps schedule only: optional ``callable(q_mean, q) -> (done,
        p_incident)`` checked at the sweep counts of :func:`check_marks` (all seeds) (so the result
        does not depend on timing or on ``n_jobs``); training stops at the first check
        that says ``done``. ``plan`` passes the risk verdict against the exact reference.

    Returns
    -------
    Learned

    Raises
    ------
    SettingsError
        On an unknown method, a bad seed or ``n_jobs``.
    SiteError
        When the goal cannot be reached from the start at all.
    """
    if method not in METHODS:
        raise SettingsError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    if not isinstance(settings, LearnSettings):
        raise SettingsError(f"settings must be LearnSettings, got {type(settings).__name__}")
    if n_jobs is None:
        n_jobs = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    elif not (_is_whole(n_jobs) and n_jobs >= 1):
        raise SettingsError(f"--jobs must be a whole number >= 1, got {n_jobs!r}")
    if not model.active[model.start]:
        raise SiteError("the start cell is not an active state of the model")

    to_go = model_cost_to_go(model) if cost_to_go is None else _checked_cost_to_go(model, cost_to_go)
    max_steps = settings.max_steps
    if max_steps is None:
        fewest = fewest_moves(model)
        if not math.isfinite(fewest):
            raise SiteError("no sequence of moves reaches the goal from the start in this model")
        max_steps = max(MIN_STEP_CAP, STEP_CAP_FACTOR * int(fewest))
    corridor = corridor_states(model, to_go) if settings.start_mode == "explore" else np.zeros(0, np.int64)
    root, states = seed_states(seed, settings.n_seeds)

    n_s, n_a, n_seeds, n_ep = model.n_states, model.n_actions, settings.n_seeds, settings.episodes
    q0 = heuristic_q(model, to_go) if settings.q_init == "heuristic" else np.zeros((n_s, n_a))
    q = np.repeat(q0[None], n_seeds, axis=0)
    if settings.schedule == "sweeps":
        return _train_sweeps(model, method, settings, q, to_go, states, root, int(max_steps), int(n_jobs), progress,
                             stop_rule)
    returns = np.zeros((n_seeds, n_ep), np.float64)
    moves = np.zeros((n_seeds, n_ep), np.int32)
    ends = np.zeros((n_seeds, n_ep), np.int16)
    table = sampling_table(model)
    decay = 0.0 if settings.step_decay is None else float(settings.step_decay)
    chunk = -(-n_ep // PROGRESS_CHUNKS)
    lock, stop, done = threading.Lock(), threading.Event(), [0]

    def run(i):
        # Chunks only pause the kernel between episodes; the generator state and the
        # tables carry over, so the arrays are the same as from one call.
        visits = np.zeros(n_s * n_a if decay > 0 else 0, np.int64)
        flat_q, rng_state, steps = q[i].reshape(-1), np.uint64(states[i]), 0
        for lo in range(0, n_ep, chunk):
            if stop.is_set():
                break
            hi = min(n_ep, lo + chunk)
            taken, rng_state = _run_seed(
                model.offsets, table, n_a, flat_q, visits, METHODS[method], float(settings.epsilon),
                float(settings.step_size), decay, float(settings.gamma), hi - lo, int(max_steps), int(model.start),
                corridor, START_SHARE, np.uint64(rng_state), returns[i, lo:hi], moves[i, lo:hi], ends[i, lo:hi],
            )
            steps += taken
            with lock:
                done[0] += hi - lo
        return steps

    began = time.perf_counter()
    with ThreadPoolExecutor(max_workers=min(int(n_jobs), n_seeds)) as pool:
        totals = _wait_all([pool.submit(run, i) for i in range(n_seeds)], stop, progress, done, n_seeds * n_ep)
    seconds = time.perf_counter() - began
    return Learned(
        method=method, settings=settings, q=q, q_mean=q.mean(axis=0), returns=returns, moves=moves, ends=ends,
        max_steps=int(max_steps), seed_entropy=_entropy(root), seed_spawn_key=tuple(int(k) for k in root.spawn_key),
        steps_total=int(sum(totals)), seconds=seconds,
    )


def _wait_all(futures, stop, progress, done, total) -> list:
    """The results of the seeds' workers, reporting progress while they run.

    Ctrl-C (or a failing progress callback) sets ``stop``, so that the workers end after
    their current chunk, and is re-raised.
    """
    try:
        pending = set(futures)
        while pending:
            _, pending = wait(pending, timeout=PROGRESS_SECONDS)
            if progress is not None:
                progress(done[0], total)
    except BaseException:
        stop.set()
        raise
    return [f.result() for f in futures]


def sweep_order(model: Model, cost_to_go: np.ndarray) -> np.ndarray:
    """The (state, action) blocks a sweep updates, in the order it updates them.

    Every action of every active state from which the goal can be reached, states in
    increasing cost to go (nearest the goal first, so that one sweep carries values
    along a whole route), actions in index order within a state.

    Returns
    -------
    int64 ``(n_pairs,)`` flat block indices ``s * n_actions + a``.
    """
    cost = _checked_cost_to_go(model, cost_to_go)
    ok = model.active & np.isfinite(cost) & ~model.goal
    states = np.flatnonzero(ok)
    states = states[np.argsort(cost[states], kind="stable")]
    return (states[:, None] * model.n_actions + np.arange(model.n_actions)[None, :]).ravel().astype(np.int64)


def check_marks(budget: int) -> list[int]:
    """Sweep counts at which the stopping rule is checked, ending with the budget.

    4, 8, 16, ... up to ``CHECK_DOUBLING_UNTIL``, then growing by ``CHECK_GROWTH`` (a
    check costs one safety tie-break and one chain solve; finer steps late waste fewer
    sweeps past the point where the verdict passes). Every seed reaches each mark before
    the rule looks, so the result is the same for any number of threads.

    Examples
    --------
    >>> check_marks(1500)
    [4, 8, 16, 32, 64, 128, 256, 512, 640, 800, 1000, 1250, 1500]
    """
    marks, m = [], FIRST_CHECK_SWEEPS
    while m < budget:
        marks.append(m)
        m = 2 * m if m < CHECK_DOUBLING_UNTIL else int(math.ceil(m * CHECK_GROWTH))
    marks.append(int(budget))
    return marks


def _train_sweeps(model, method, settings, q, to_go, states, root, max_steps, n_jobs, progress, stop_rule):
    """The sweeps schedule of :func:`train` (see :class:`LearnSettings`)."""
    n_a, n_seeds = model.n_actions, settings.n_seeds
    order = sweep_order(model, to_go)
    table = sampling_table(model)
    decay = SWEEP_DECAY if settings.step_decay is None else float(settings.step_decay)
    horizon = 0.0 if settings.sweep_horizon is None else float(settings.sweep_horizon)
    rng_states = [np.uint64(x) for x in states]
    checks, p_checks, values = [], [], []
    lock, stop, done = threading.Lock(), threading.Event(), [0]
    budget = int(settings.max_sweeps)
    marks = check_marks(budget)

    def run(i, first, last):
        flat_q = q[i].reshape(-1)
        at = first
        while at < last and not stop.is_set():
            # Small calls, so that progress is reported and a stop request is honoured.
            step = min(last - at, max(1, budget // PROGRESS_CHUNKS))
            rng_states[i] = np.uint64(_sweep_seed(
                model.offsets, table, n_a, flat_q, METHODS[method], float(settings.epsilon), float(settings.gamma),
                decay, horizon, order, at, step, rng_states[i]))
            at += step
            with lock:
                done[0] += step

    began = time.perf_counter()
    swept, stopped = 0, False
    with ThreadPoolExecutor(max_workers=min(int(n_jobs), n_seeds)) as pool:
        for mark in marks:
            _wait_all([pool.submit(run, i, swept, mark) for i in range(n_seeds)], stop, progress, done,
                      n_seeds * budget)
            swept = mark
            mean = q.mean(axis=0)
            p_incident = math.nan
            if stop_rule is not None:
                stopped, p_incident = stop_rule(mean, q)
            checks.append(swept * order.size * n_seeds)
            p_checks.append(p_incident)
            values.append(q[:, model.start, :].max(axis=1))
            if stopped:
                break
    seconds = time.perf_counter() - began
    empty = np.zeros((n_seeds, 0))
    return Learned(
        method=method, settings=settings, q=q, q_mean=q.mean(axis=0), returns=empty, moves=empty.astype(np.int32),
        ends=empty.astype(np.int16), max_steps=max_steps, seed_entropy=_entropy(root),
        seed_spawn_key=tuple(int(k) for k in root.spawn_key), steps_total=int(checks[-1]), seconds=seconds,
        check_updates=np.array(checks, np.int64), check_p_incident=np.array(p_checks, np.float64),
        check_value=np.array(values, np.float64).T, stopped_by_rule=bool(stopped), n_sweeps=int(swept),
    )


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


@numba.njit(cache=True, nogil=True)
def _run_seed(offsets, table, n_actions, q, visits, method, epsilon, step_size, decay, gamma, n_episodes,
              max_steps, start, corridor, start_share, rng_state, returns, moves, ends):
    """All episodes of one seed, updating ``q`` (flat, ``s * n_actions + a``) in place.

    ``table`` is the outcome table in sampling form (see :func:`sampling_table`);
    ``method`` 0 is SARSA, 1 is Q-learning; ``decay`` 0 means a constant step size.
    Returns the number of steps taken and the generator state to continue from.
    """
    state = rng_state
    total = 0
    n_corridor = corridor.size
    n_records = table.size
    for ep in range(n_episodes):
        s = start
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
        end = -1
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
            if method == 0:
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
    return total, state


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
def _sweep_seed(offsets, table, n_actions, q, method, epsilon, gamma, decay, horizon, order, done, n_sweeps,
                rng_state):
    """Sweeps ``done + 1`` to ``done + n_sweeps`` over the (state, action) blocks in ``order``.

    One transition sampled from the model per block and sweep, one TD update of ``q``
    (flat, in place).

    Q-learning (``method`` 1) bootstraps on the best next value; SARSA (0) on the value
    of a next action drawn from the current epsilon-greedy policy. Every block is
    updated once per sweep, so the ``n``-th update of every block falls in sweep ``n``
    and its step size is one number per sweep: ``n ** -decay`` (a polynomial schedule,
    ``decay`` in (0.5, 1]) when ``horizon`` is 0, else ``horizon / (horizon + n - 1)``.
    Indices are unsigned (see :func:`_greedy`). Returns the generator state to
    continue from.
    """
    state = rng_state
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
                q[k] += alpha * (r - q[k])
                continue
            base2 = np.uint64(code) * n_a
            state, g2, best2 = _greedy(q, base2, n_actions, state)
            if method == 0:
                state, a2 = _explore(g2, n_actions, epsilon, state)
                q[k] += alpha * (r + gamma * q[base2 + np.uint64(a2)] - q[k])
            else:
                q[k] += alpha * (r + gamma * best2 - q[k])
    return state


__all__ = [
    "CORRIDOR_MARGIN", "END_STEP_CAP", "METHODS", "Learned", "LearnSettings", "corridor_states",
    "TABLE_DTYPE", "fewest_moves", "greedy_actions", "heuristic_q", "learned_ties", "model_cost_to_go",
    "sweep_order", "check_marks",
    "sampling_table", "seed_states", "train",
]


def learning_curves(learned: Learned, n_bins: int = 1000) -> dict[str, np.ndarray]:
    """Per-seed learning curves averaged over consecutive blocks of episodes.

    With the sweeps schedule: ``update_end`` (int64 ``(n_checks,)``, updates over all
    seeds at each check), ``start_value`` (float64 ``(n_seeds, n_checks)``, each seed's
    greedy value at the start) and ``p_incident`` (float64 ``(n_checks,)``, the
    consensus policy's exact P(incident) as the stopping rule found it).

    Returns ``episode_end`` (int64 ``(n_bins,)``, last episode of each block, 1-based)
    and float64 ``(n_seeds, n_bins)`` arrays ``return_mean``, ``moves_mean``,
    ``goal_share`` and ``incident_share`` (boundary or an ending hazard). Small enough
    to keep in a run folder whatever the number of episodes.
    """
    if learned.settings.schedule == "sweeps":
        return {"update_end": learned.check_updates, "start_value": learned.check_value,
                "p_incident": learned.check_p_incident}
    n_ep = learned.returns.shape[1]
    n_bins = max(1, min(int(n_bins), n_ep))
    edges = np.linspace(0, n_ep, n_bins + 1).round().astype(np.int64)
    starts, sizes = edges[:-1], np.diff(edges)

    def block_mean(values):
        return np.add.reduceat(np.asarray(values, dtype=np.float64), starts, axis=1) / sizes

    return {
        "episode_end": edges[1:],
        "return_mean": block_mean(learned.returns),
        "moves_mean": block_mean(learned.moves),
        "goal_share": block_mean(learned.ends == EVENT_GOAL),
        "incident_share": block_mean(learned.ends >= 2),
    }
