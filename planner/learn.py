"""Learners: SARSA gives the cautious Q, Q-learning the shortest Q.

This stage owns tabular temporal-difference learning over the outcome table of a
:class:`~planner.model.Model`: the settings (:class:`LearnSettings`), the two training
schedules with their stopping rule (:func:`train`, :func:`check_marks`), the learned
arrays (:class:`Learned`), and the tie sets of a learned Q (:func:`learned_ties`, from
the seeds' spread) from which the delivered policy is picked by safety
(:func:`planner.ties.safest_among`).

Two modules beside it hold the parts: :mod:`planner.learn_paths` the cheapest paths
on the model that training starts from (the heuristic initial Q, the step cap, the
sweep order), :mod:`planner.learn_kernels` the numba kernels, which sample outcomes
straight from the model's flat CSR arrays (a cumulative walk inside each (state,
action) block that cannot fall off the end), so learning and the exact methods of
:mod:`planner.exact` see one and the same model. Each seed owns its generator state,
so the results do not depend on how many threads run the seeds.
"""

from __future__ import annotations

import math
import os
import threading
import time
from concurrent.futures import ThreadPoolExecutor, wait
from dataclasses import dataclass, field

import numpy as np

from planner import checks
from planner.errors import SettingsError, SiteError
from planner.learn_kernels import (
    END_STEP_CAP,
    QLEARNING,
    SARSA,
    Episodes,
    Starts,
    rates,
    run_episodes,
    run_sweeps,
    sampling_inputs,
    seed_states,
)
from planner.learn_paths import (
    checked_cost_to_go,
    cost_from_start,
    fewest_moves,
    heuristic_q,
    model_cost_to_go,
    sweep_order,
)
from planner.model import Model
from planner.outcomes import EVENT_BOUNDARY, EVENT_GOAL

#: Method names accepted by :func:`train`, and their kernel codes.
METHODS = {"sarsa": SARSA, "qlearning": QLEARNING}
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
        checks.probability(self.epsilon, "LearnSettings.epsilon")
        checks.number(self.step_size, "LearnSettings.step_size", low=0.0, high=1.0, low_open=True)
        checks.number(self.step_decay, "LearnSettings.step_decay", low=0.5, high=1.0, low_open=True, unset=True)
        checks.number(self.gamma, "LearnSettings.gamma", low=0.0, high=1.0, low_open=True)
        checks.whole(self.episodes, "LearnSettings.episodes", low=1)
        checks.whole(self.max_steps, "LearnSettings.max_steps", low=1, unset=True)
        checks.whole(self.n_seeds, "LearnSettings.n_seeds", low=1)
        checks.one_of(self.start_mode, "LearnSettings.start_mode", ("start", "explore"))
        checks.one_of(self.q_init, "LearnSettings.q_init", ("heuristic", "zeros"))
        checks.one_of(self.schedule, "LearnSettings.schedule", SCHEDULES)
        checks.whole(self.max_sweeps, "LearnSettings.max_sweeps", low=1, high=MAX_SWEEPS)
        checks.number(self.sweep_horizon, "LearnSettings.sweep_horizon", low=1.0, says="a number >= 1", unset=True)


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
    checks.number(margin, "margin", low=0.0, says="a number >= 0")
    to_go = model_cost_to_go(model) if cost_to_go is None else checked_cost_to_go(model, cost_to_go)
    from_start = cost_from_start(model)
    budget = (1.0 + margin) * to_go[model.start]
    ok = model.active & np.isfinite(to_go) & np.isfinite(from_start) & (from_start + to_go <= budget * (1 + 1e-12))
    ok[model.start] = True
    return np.flatnonzero(ok).astype(np.int64)



# ----------------------------------------------------------------------------- consensus policy


def greedy_actions(q: np.ndarray, rng: np.random.Generator | None = None) -> np.ndarray:
    """The greedy action of every state by action order, int64 ``(n_states,)``.

    Without ``rng``, exact ties go to the lowest action index; with ``rng``, uniformly
    among the tied actions. Neither is how the product delivers a policy: ties there
    go to the safest action (:func:`planner.ties.safest_among`). This is the plain
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
    (:func:`planner.ties.safest_among`), never by action order.

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
    else:
        checks.whole(n_jobs, "n_jobs", low=1)
    if not model.active[model.start]:
        raise SiteError("the start cell is not an active state of the model")

    to_go = model_cost_to_go(model) if cost_to_go is None else checked_cost_to_go(model, cost_to_go)
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
    sampling = sampling_inputs(model)
    decay = 0.0 if settings.step_decay is None else float(settings.step_decay)
    learning = rates(METHODS[method], settings.epsilon, settings.gamma, step_size=settings.step_size, decay=decay)
    starts = Starts(int(model.start), corridor, START_SHARE, int(max_steps))
    chunk = -(-n_ep // PROGRESS_CHUNKS)
    lock, stop, done = threading.Lock(), threading.Event(), [0]

    def run(i):
        # Chunks only pause the kernel between episodes; the generator state and the
        # tables carry over, so the arrays are the same as from one call.
        visits = np.zeros(n_s * n_a if decay > 0 else 0, np.int64)
        flat_q, rng, steps = q[i].reshape(-1), states[i:i + 1], 0
        for lo in range(0, n_ep, chunk):
            if stop.is_set():
                break
            hi = min(n_ep, lo + chunk)
            out = Episodes(returns[i, lo:hi], moves[i, lo:hi], ends[i, lo:hi])
            steps += run_episodes(sampling, learning, starts, flat_q, visits, rng, out)
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
    n_seeds = settings.n_seeds
    order = sweep_order(model, to_go)
    sampling = sampling_inputs(model)
    decay = SWEEP_DECAY if settings.step_decay is None else float(settings.step_decay)
    horizon = 0.0 if settings.sweep_horizon is None else float(settings.sweep_horizon)
    learning = rates(METHODS[method], settings.epsilon, settings.gamma, decay=decay, horizon=horizon)
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
            run_sweeps(sampling, learning, order, flat_q, states[i:i + 1], at, step)
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
        "incident_share": block_mean(learned.ends >= EVENT_BOUNDARY),
    }


__all__ = [
    "CORRIDOR_MARGIN", "END_STEP_CAP", "METHODS", "Learned", "LearnSettings", "check_marks", "corridor_states",
    "greedy_actions", "learned_ties", "learning_curves", "train",
]
