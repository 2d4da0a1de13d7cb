"""Risk: the absorbing-chain analysis of a policy, its Monte Carlo cross-check, the table.

This stage owns what a reviewer reads before a field trial. A policy (greedy actions,
or a Q table to take them from) executed with noise epsilon on a model (which fixes
the drift scale) induces an absorbing Markov chain (:func:`planner.model.policy_chain`).
From one sparse solve of that chain come, for every cell, the probability of ending
the run with each event (:class:`Absorption`, :func:`risk_map`); :func:`evaluate`
turns the start cell's figures into a :class:`RiskRow`: P(goal), P(incident) by zone
and ``boundary``, P(never absorbed), expected moves and metres given success, the
same within a step budget, P(at least one entry) for zones that do not end the run,
and a seeded Monte Carlo estimate beside each probability: shown with its
Clopper-Pearson (exact binomial) 95% interval, and checked against the exact figure with
the same interval at the table's level (:meth:`McEstimate.contains`).
:func:`sensitivity` repeats that over noise levels and drift scales, and
:func:`format_table` prints the result for people (text, markdown) and programs (csv,
json).

States from which the policy can never end the run ("trapped") are found by graph
reachability and reported as ``p_never``, never as a solver error or a silent zero.

The module runs a little over 600 lines on purpose: about a fifth of it is the
:class:`RiskRow` record (every figure a row carries, with its plain-data form), kept
beside :func:`evaluate`, the one function that fills it, so that each figure is defined
in one place. Its presentation (text, csv, markdown, json) is in :mod:`planner.risk_table`.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from planner import checks, notation
from planner.errors import SettingsError, SolverError
from planner.model import (
    EVENT_BOUNDARY,
    EVENT_GOAL,
    EVENT_HAZARD,
    EVENT_NONE,
    Chain,
    Model,
    build_model,
    epsilon_greedy,
    policy_chain,
    reaches_absorption,
    solve_transient,
)
from planner.montecarlo import (
    DEFAULT_MAX_ROLLOUT_STEPS,
    END_NEVER,
    END_TRUNCATED,
    Z95,
    McEstimate,
    exact_interval,
    mc_estimate,
    sample_runs,
    table_flag_z,
)
from planner.ties import equally_good, safest_among

#: Default noise levels and drift scales of the sensitivity table.
DEFAULT_NOISES = (0.0, 0.05, 0.1, 0.2)
DEFAULT_DRIFT_SCALES = (1.0, 1.5, 2.0)
#: Relative residual every linear solve must meet.
SOLVE_TOLERANCE = 1e-8
#: The probabilities of the ways a run can end must sum to 1 within this.
SUM_TOLERANCE = 1e-8
#: Probabilities below this print as "< 1 in 10^12": the solves are not that accurate.
PRINT_FLOOR = notation.FLOOR
#: Output formats of :func:`format_table`.
FORMATS = ("text", "csv", "json", "markdown")


# ----------------------------------------------------------------------------- results


@dataclass(frozen=True)
class RiskRow:
    """One row of the risk table: one policy, one noise level, one drift scale.

    All probabilities are from the start cell. Exact figures come from the absorbing
    chain; Monte Carlo figures (when ``n_rollouts > 0``) are in ``mc``.

    Attributes
    ----------
    policy : the policy's name.
    noise : execution noise epsilon (greedy with ``1 - noise``, uniform otherwise).
    drift_scale : the model's drift scale.
    p_goal : P(the run ends at the goal).
    p_incident : P(the run ends in an incident): the sum of ``p_by_event``.
    p_by_event : P(the run ends with each event), for every hazard that ends the run
        and ``"boundary"``.
    p_never : P(the run never ends): the policy loops forever with this probability.
    expected_moves, expected_m : expected moves and commanded metres given the run
        ends at the goal (NaN when ``p_goal`` is 0).
    residual : largest relative residual of the linear solves behind this row.
    n_trapped_states : states from which the run can never end under this policy.
    budget : step budget T in moves, or None; budget_m : T times the move length (the travel
        budget in metres, rounded down to whole moves; a diagonal move travels farther).
    p_goal_within_budget, p_incident_within_budget, p_timeout : P(goal within T moves),
        P(incident within T moves), P(still going after T moves); None without budget.
    p_entry : P(at least one move passes through the zone) for every hazard that does
        not end the run; the start cell itself does not count as an entry, and only
        moves after which the run goes on count (as in the model's crossing mask).
    n_rollouts : Monte Carlo rollouts made (0: none).
    n_truncated : rollouts stopped at the step cap before ending (counted in ``n``
        but in no event).
    mc : Monte Carlo estimates, keyed ``"goal"``, ``"incident"``, ``"never"``,
        ``"event:<name>"``, ``"entry:<zone>"`` and, with a budget, ``"goal_within_budget"``,
        ``"incident_within_budget"`` and ``"timeout"``.
    mc_disagrees : keys of ``mc`` whose exact figure falls outside the Clopper-Pearson
        interval of its count at ``z = mc_flag_z`` (:meth:`McEstimate.contains`).
    mc_flag_z : the normal quantile of the Clopper-Pearson interval behind
        ``mc_disagrees`` (95% by default; a table uses its Bonferroni level).
    verdict : what the policy is: ``"converged"`` or ``"not converged"`` for a learned
        policy (its risk verdict), ``"exact reference (ties by safety)"`` for a
        reference, ``""`` when not judged (e.g. ``veerwise risk`` on given policies).
    p_incident_range : for a reference at the run's noise and drift scale, P(incident)
        of the safest and the riskiest equally good tie-breaks (``p_incident`` is the
        low end); else None.
    grid_check : the half-cell check of this row's policy (:class:`GridCheck` as plain
        data), on the rows of the delivered policies at the plan's noise and drift scale.
    """

    policy: str
    noise: float
    drift_scale: float
    p_goal: float
    p_incident: float
    p_by_event: dict[str, float]
    p_never: float
    expected_moves: float
    expected_m: float
    residual: float
    n_trapped_states: int = 0
    budget: int | None = None
    budget_m: float | None = None
    p_goal_within_budget: float | None = None
    p_incident_within_budget: float | None = None
    p_timeout: float | None = None
    p_entry: dict[str, float] = field(default_factory=dict)
    n_rollouts: int = 0
    n_truncated: int = 0
    mc: dict[str, McEstimate] = field(default_factory=dict)
    mc_disagrees: tuple[str, ...] = ()
    mc_flag_z: float = Z95
    verdict: str = ""
    p_incident_range: tuple[float, float] | None = None
    grid_check: dict | None = None

    def exact(self) -> dict[str, float]:
        """The exact figure behind every Monte Carlo key (see ``mc``)."""
        out = {"goal": self.p_goal, "incident": self.p_incident, "never": self.p_never}
        out.update({f"event:{k}": v for k, v in self.p_by_event.items()})
        out.update({f"entry:{k}": v for k, v in self.p_entry.items()})
        if self.budget is not None:
            out["goal_within_budget"] = self.p_goal_within_budget
            out["incident_within_budget"] = self.p_incident_within_budget
            out["timeout"] = self.p_timeout
        return out

    @classmethod
    def from_dict(cls, data: dict) -> RiskRow:
        """Inverse of :meth:`as_dict` (``null`` back to NaN), for rows read from ``risk.json``."""

        def num(x):
            return math.nan if x is None else float(x)

        def opt(x):
            return None if x is None else float(x)

        try:
            return cls(
                policy=str(data["policy"]), noise=num(data["noise"]), drift_scale=num(data["drift_scale"]),
                p_goal=num(data["p_goal"]), p_incident=num(data["p_incident"]),
                p_by_event={k: num(v) for k, v in data["p_by_event"].items()}, p_never=num(data["p_never"]),
                expected_moves=num(data["expected_moves"]), expected_m=num(data["expected_m"]),
                residual=num(data["residual"]), n_trapped_states=int(data["n_trapped_states"]),
                budget=data["budget"], budget_m=opt(data.get("budget_m")),
                p_goal_within_budget=opt(data["p_goal_within_budget"]),
                p_incident_within_budget=opt(data["p_incident_within_budget"]), p_timeout=opt(data["p_timeout"]),
                p_entry={k: num(v) for k, v in data["p_entry"].items()}, n_rollouts=int(data["n_rollouts"]),
                n_truncated=int(data["n_truncated"]),
                mc={k: McEstimate(int(m["count"]), int(m["n"]), num(m["estimate"]), num(m["lo"]), num(m["hi"]))
                    for k, m in data["mc"].items()},
                mc_disagrees=tuple(data["mc_disagrees"]), mc_flag_z=num(data["mc_flag_z"]),
                verdict=str(data.get("verdict", "")),
                p_incident_range=None if data.get("p_incident_range") is None
                else (num(data["p_incident_range"][0]), num(data["p_incident_range"][1])),
                grid_check=_grid_check_record(data.get("grid_check")),
            )
        except (KeyError, TypeError, ValueError, AttributeError) as err:
            raise SettingsError(f"a risk table row is malformed ({err!r})") from err

    def as_dict(self) -> dict:
        """Plain data (floats, ints, strings, None for NaN), for JSON."""
        return {
            "policy": self.policy, "noise": _plain(self.noise), "drift_scale": _plain(self.drift_scale),
            "p_goal": _plain(self.p_goal), "p_incident": _plain(self.p_incident),
            "p_by_event": {k: _plain(v) for k, v in self.p_by_event.items()}, "p_never": _plain(self.p_never),
            "expected_moves": _plain(self.expected_moves), "expected_m": _plain(self.expected_m),
            "residual": _plain(self.residual), "n_trapped_states": int(self.n_trapped_states),
            "budget": self.budget, "budget_m": _plain(self.budget_m),
            "p_goal_within_budget": _plain(self.p_goal_within_budget),
            "p_incident_within_budget": _plain(self.p_incident_within_budget), "p_timeout": _plain(self.p_timeout),
            "p_entry": {k: _plain(v) for k, v in self.p_entry.items()},
            "n_rollouts": int(self.n_rollouts), "n_truncated": int(self.n_truncated),
            "mc": {k: {"count": int(m.count), "n": int(m.n), "estimate": _plain(m.estimate), "lo": _plain(m.lo),
                       "hi": _plain(m.hi)} for k, m in self.mc.items()},
            "mc_disagrees": list(self.mc_disagrees), "mc_flag_z": _plain(self.mc_flag_z),
            "verdict": self.verdict,
            "p_incident_range": None if self.p_incident_range is None
            else [_plain(self.p_incident_range[0]), _plain(self.p_incident_range[1])],
            "grid_check": self.grid_check,
        }


def _grid_check_record(data):
    """A row's grid-check record as read (a dict) or None; :func:`planner.gridcheck.row_from_record` checks it."""
    if data is None or isinstance(data, dict):
        return data or None
    raise TypeError(f"grid_check is {type(data).__name__}, not a record")


@dataclass(frozen=True)
class Absorption:
    """How the run ends from every state, under one stochastic policy.

    Attributes
    ----------
    chain : the chain solved.
    probs : float64 ``(n_states, n_columns)``; column ``e`` is P(the run ends with event
        code ``e``) (column 0, "none", is 0; with ``absorb_crossing`` the last column is
        P(crossing that zone first)). Rows of inactive states are NaN.
    never : float64 ``(n_states,)``, P(the run never ends); NaN on inactive states.
    moves : float64 ``(n_states,)``, expected moves until the run ends; ``inf`` where
        ``never > 0``, NaN on inactive states.
    reaches : bool ``(n_states,)``, active states that end the run with positive
        probability (the rest are trapped).
    residual : largest relative residual of the solve.
    """

    chain: Chain
    probs: np.ndarray
    never: np.ndarray
    moves: np.ndarray
    reaches: np.ndarray
    residual: float


# ----------------------------------------------------------------------------- exact


def absorption(model: Model, action_probs: np.ndarray, *, absorb_crossing: int | None = None) -> Absorption:
    """Solve the absorbing chain of a stochastic policy for every state at once.

    One sparse solve ``(I - T) X = [B, t, 1]`` on the states that reach absorption,
    where ``B`` holds the one-move absorption probabilities of each event, ``t`` the
    one-move probability of falling into a trapped state and ``1`` counts moves.

    Parameters
    ----------
    model : the model.
    action_probs : float ``(n_states, n_actions)``, rows of active states sum to 1.
    absorb_crossing : index of a non-ending hazard to treat as absorbing (see
        :func:`planner.model.policy_chain`).

    Returns
    -------
    Absorption

    Raises
    ------
    SolverError
        When the solve misses its residual tolerance, or the ways a run can end do not
        sum to 1.
    """
    chain = policy_chain(model, action_probs, absorb_crossing=absorb_crossing)
    return _absorb(model, chain)


def _absorb(model: Model, chain: Chain) -> Absorption:
    active = model.active
    reaches = reaches_absorption(chain, active)
    trapped = active & ~reaches
    n_s = model.n_states
    into_trap = np.asarray(chain.transient @ trapped.astype(float)).ravel()
    rhs = np.column_stack([chain.absorb.toarray(), into_trap, np.ones(n_s)])
    # Events that never happen (e.g. "none", zones that do not end the run) need no solve.
    used = np.flatnonzero(np.any(rhs[reaches] != 0.0, axis=0))
    x = np.zeros_like(rhs)
    residual = 0.0
    if used.size:
        x[:, used], residual = solve_transient(chain, rhs[:, used], reaches, tol=SOLVE_TOLERANCE)
    n_cols = chain.absorb.shape[1]
    probs = _clip_unit(x[:, :n_cols])
    never = _clip_unit(x[:, n_cols])
    never[trapped] = 1.0
    total = probs.sum(axis=1) + never
    err = float(np.max(np.abs(total[active] - 1.0), initial=0.0))
    if err > SUM_TOLERANCE:
        raise SolverError(f"absorbing-chain solve: end probabilities sum to 1 only within {err:.2e}")
    moves = np.where(never > 0, np.inf, x[:, n_cols + 1])
    probs[~active] = np.nan
    never[~active] = np.nan
    moves[~active] = np.nan
    return Absorption(chain=chain, probs=probs, never=never, moves=moves, reaches=reaches, residual=residual)


def _clip_unit(x: np.ndarray) -> np.ndarray:
    """Probabilities clipped to [0, 1]; anything further out than round-off is a bug."""
    x = np.asarray(x, dtype=float)
    worst = float(np.max(np.maximum(-x, x - 1.0), initial=0.0))
    if worst > SUM_TOLERANCE:
        raise SolverError(f"a computed probability lies {worst:.2e} outside [0, 1]")
    return np.clip(x, 0.0, 1.0)


def risk_map(model: Model, action_probs: np.ndarray) -> np.ndarray:
    """Per-cell incident probability: P(the run ends in a hazard or off the boundary).

    Parameters
    ----------
    model : the model.
    action_probs : float ``(n_states, n_actions)``, e.g. from
        :func:`planner.model.epsilon_greedy`.

    Returns
    -------
    numpy.ndarray
        float64 ``(n_states,)``, in [0, 1] on active states (0 on trapped ones), NaN on
        inactive states (outside, ending hazards, goal). Reshape with ``model.shape``.
    """
    return incident_probability(absorption(model, action_probs))


def incident_probability(result: Absorption) -> np.ndarray:
    """P(incident) from every state of a solved chain (NaN on inactive states)."""
    # Summing events may overshoot 1 by round-off; NaN rows stay NaN.
    return np.clip(result.probs[:, EVENT_BOUNDARY:].sum(axis=1), 0.0, 1.0)


def seed_incidents(model: Model, seed_policies, noise: float) -> np.ndarray:
    """Exact P(incident) from the start of every training seed's own policy.

    A learned figure is a property of the yard only when it does not move with the
    seed; the spread of these values is what the summary and the briefing report as
    its range.

    Parameters
    ----------
    model : the model.
    seed_policies : one policy per seed: greedy actions ``(n_states,)`` (e.g. with ties
        broken by safety) or a Q table ``(n_states, n_actions)``.
    noise : execution noise epsilon of the figure.

    Returns
    -------
    numpy.ndarray
        float64 ``(n_seeds,)``.
    """
    out = np.empty(len(seed_policies))
    for i, policy in enumerate(seed_policies):
        probs = epsilon_greedy(_policy_actions(model, policy, noise), model.n_actions, noise)
        out[i] = incident_probability(absorption(model, probs))[model.start]
    return out


def _policy_actions(model: Model, policy, noise: float) -> np.ndarray:
    policy = np.asarray(policy)
    if policy.ndim == 2:
        if policy.shape != (model.n_states, model.n_actions):
            raise SettingsError(f"Q table has shape {policy.shape}, model needs {(model.n_states, model.n_actions)}")
        # Ties by safety at the row's own noise, never by action order.
        return safest_among(model, equally_good(policy), noise, value=policy, riskiest=False).greedy
    if policy.shape != (model.n_states,):
        raise SettingsError(f"greedy actions have shape {policy.shape}, model needs ({model.n_states},)")
    if not np.issubdtype(policy.dtype, np.integer):
        raise SettingsError(f"greedy actions must be whole numbers, got dtype {policy.dtype}")
    act = policy.astype(np.int64)
    bad = model.active & ((act < 0) | (act >= model.n_actions))
    if bad.any():
        s = int(np.flatnonzero(bad)[0])
        raise SettingsError(f"greedy action {act[s]} of state {s} is not in 0..{model.n_actions - 1}")
    return np.where(model.active, act, 0)


def _ending_hazards(model: Model, hazards) -> np.ndarray:
    """Which hazards end the run: from ``hazards`` (HazardInfo) or read off the table."""
    n_h = len(model.event_names) - EVENT_HAZARD
    if hazards is not None:
        if len(hazards) != n_h:
            raise SettingsError(f"{len(hazards)} hazards given, the model has {n_h}")
        return np.array([bool(h.ends_run) for h in hazards], dtype=bool)
    # A zone whose bit is ever set in the crossing mask does not end the run.
    union = int(np.bitwise_or.reduce(model.crossed)) if model.crossed.size else 0
    return np.array([not (union >> h) & 1 for h in range(n_h)], dtype=bool)


def _conditional_on_goal(model: Model, chain: Chain, action_probs: np.ndarray, h: np.ndarray,
                         reaches: np.ndarray) -> tuple[float, float, float]:
    """Expected moves and commanded metres from the start, given the run ends at the goal.

    With ``h`` = P(goal) per state, ``N = (I - T)^-1`` and ``g(s, a)`` = P(goal | the
    next action from ``s`` is ``a``), the expected moves on the event "goal" are
    ``sum_t N[s, t] h(t)`` (each move made from a transient state ``t`` counts when
    the run then ends at the goal, which has probability ``h(t)``), and the metres
    ``sum_t N[s, t] sum_a pi(t, a) m(a) g(t, a)``; dividing by ``h(s)`` conditions on
    success (the h-transform of the chain).
    """
    n_s, n_a = model.n_states, model.n_actions
    counts = np.diff(model.offsets)
    value = np.where(model.event == EVENT_GOAL, 1.0, 0.0)
    going = model.event == EVENT_NONE
    value[going] = h[model.next_state[going]]
    weighted = model.prob * value
    g = np.zeros(n_s * n_a)
    full = counts > 0
    if weighted.size:
        g[full] = np.add.reduceat(weighted, model.offsets[:-1][full])
    g = g.reshape(n_s, n_a)
    check = float(np.max(np.abs((action_probs * g).sum(axis=1) - h)[reaches], initial=0.0))
    if check > SUM_TOLERANCE:
        raise SolverError(f"goal probabilities are not self-consistent within {check:.2e} (one-step check)")
    metres = (action_probs * g * model.move_m[None, :]).sum(axis=1)
    y, residual = solve_transient(chain, np.column_stack([h, metres]), reaches, tol=SOLVE_TOLERANCE)
    s0 = model.start
    if h[s0] <= 0.0:
        return math.nan, math.nan, residual
    return float(y[s0, 0] / h[s0]), float(y[s0, 1] / h[s0]), residual


def _within_budget(model: Model, chain: Chain, budget: int) -> tuple[np.ndarray, float]:
    """Absorption probability of each column within ``budget`` moves, and P(timeout)."""
    step = chain.transient.T.tocsr()
    absorb_t = chain.absorb.T.tocsr()
    dist = np.zeros(model.n_states)
    dist[model.start] = 1.0
    ended = np.zeros(chain.absorb.shape[1])
    for _ in range(budget):
        ended += absorb_t @ dist
        dist = step @ dist
        if not dist.any():
            break
    timeout = float(dist.sum())
    err = abs(ended.sum() + timeout - 1.0)
    if err > SUM_TOLERANCE:
        raise SolverError(f"step-budget iteration: probabilities sum to 1 only within {err:.2e}")
    return _clip_unit(ended), min(max(timeout, 0.0), 1.0)


def evaluate(model: Model, greedy_action, *, noise: float, name: str = "policy", budget: int | None = None,
             rollouts: int = 0, rng: np.random.Generator | None = None,
             max_rollout_steps: int = DEFAULT_MAX_ROLLOUT_STEPS, hazards=None, flag_z: float = Z95) -> RiskRow:
    """The risk row of one policy at one noise level on one model.

    Parameters
    ----------
    model : the model (its ``dynamics.drift_scale`` is the row's drift scale).
    greedy_action : int ``(n_states,)`` greedy actions, or a Q table
        ``(n_states, n_actions)`` to take them from (ties to the safest at ``noise``,
        see :func:`planner.ties.safest_among`).
    noise : execution noise epsilon in [0, 1].
    name : the policy's name in the table.
    budget : step budget T (moves), or None.
    rollouts : Monte Carlo rollouts (0: none).
    rng : the generator of the rollouts; required when ``rollouts > 0``.
    max_rollout_steps : a rollout still going after this many moves is truncated
        (raised to ``budget`` when that is larger).
    hazards : the grid's ``HazardInfo`` tuple, to say which hazards end the run; by
        default read off the table (a zone ever crossed without ending the run does
        not end it).
    flag_z : normal quantile of the Clopper-Pearson interval an exact figure must fall
        in not to be flagged (default: 95%). A table makes many checks, and
        about 1 in 20 misses a 95% interval by chance; a larger ``z`` (e.g. a
        Bonferroni level for the whole table) makes a flag evidence of a real
        disagreement.

    Returns
    -------
    RiskRow

    Raises
    ------
    SettingsError
        On a bad policy, noise, budget or rollout setting, or a start state that is
        not active.
    SolverError
        When a solve misses its tolerance.
    """
    if not model.active[model.start]:
        raise SettingsError(f"start state {model.start} is not a state the vehicle can be in")
    checks.whole(budget, "risk.budget", low=0, says="a whole number of moves >= 0", unset=True)
    checks.whole(rollouts, "risk.rollouts", low=0)
    if rollouts > 0 and not isinstance(rng, np.random.Generator):
        raise SettingsError("Monte Carlo rollouts need a numpy.random.Generator (rng=...)")
    if not (isinstance(flag_z, (int, float)) and math.isfinite(flag_z) and flag_z > 0):
        raise SettingsError(f"flag_z must be a positive number, got {flag_z!r}")
    if not (isinstance(max_rollout_steps, (int, np.integer)) and max_rollout_steps >= 1):
        raise SettingsError(f"max_rollout_steps must be a whole number >= 1, got {max_rollout_steps!r}")
    greedy = _policy_actions(model, greedy_action, noise)
    action_probs = epsilon_greedy(greedy, model.n_actions, noise)
    ends = _ending_hazards(model, hazards)
    names = model.event_names
    s0 = model.start

    result = absorption(model, action_probs)
    row_probs = result.probs[s0]
    incident_codes = [EVENT_BOUNDARY] + [EVENT_HAZARD + h for h in np.flatnonzero(ends)]
    p_by_event = {names[c]: float(row_probs[c]) for c in incident_codes}
    p_incident = min(float(row_probs[EVENT_BOUNDARY:].sum()), 1.0)
    p_goal = float(row_probs[EVENT_GOAL])
    p_never = float(result.never[s0])
    h = np.nan_to_num(result.probs[:, EVENT_GOAL], nan=0.0)
    moves, metres, res_cond = _conditional_on_goal(model, result.chain, action_probs, h, result.reaches)
    residual = max(result.residual, res_cond)

    within = {}
    if budget is not None:
        ended, timeout = _within_budget(model, result.chain, int(budget))
        within = dict(p_goal_within_budget=float(ended[EVENT_GOAL]),
                      p_incident_within_budget=min(float(ended[EVENT_BOUNDARY:].sum()), 1.0),
                      p_timeout=timeout)

    p_entry = {}
    for h_idx in np.flatnonzero(~ends):
        entry = absorption(model, action_probs, absorb_crossing=int(h_idx))
        p_entry[names[EVENT_HAZARD + h_idx]] = float(entry.probs[s0, -1])
        residual = max(residual, entry.residual)

    row = RiskRow(
        policy=str(name), noise=float(noise), drift_scale=float(model.dynamics.drift_scale), p_goal=p_goal,
        p_incident=p_incident, p_by_event=p_by_event, p_never=p_never, expected_moves=moves, expected_m=metres,
        residual=float(residual), n_trapped_states=int((model.active & ~result.reaches).sum()),
        budget=None if budget is None else int(budget),
        budget_m=None if budget is None else int(budget) * float(np.min(model.move_m)), p_entry=p_entry, **within,
    )
    if rollouts > 0:
        row = _with_monte_carlo(row, model, action_probs, result.reaches, ends, int(rollouts), rng,
                                max(int(max_rollout_steps), int(budget or 0)), float(flag_z))
    return row


def sensitivity(grid, dynamics, policies: Mapping[str, np.ndarray], *, noises: Sequence[float] = DEFAULT_NOISES,
                drift_scales: Sequence[float] = DEFAULT_DRIFT_SCALES, budget: int | None = None,
                rollouts: int = 0, seed: np.random.SeedSequence | int | None = None,
                max_rollout_steps: int = DEFAULT_MAX_ROLLOUT_STEPS, flag_z: float = Z95,
                model: Model | None = None, progress=None) -> list[RiskRow]:
    """The risk table over drift scales, policies and noise levels.

    The model is rebuilt once per drift scale (``dataclasses.replace(dynamics,
    drift_scale=m)``). Rows come ordered by drift scale, then policy (in the mapping's
    order), then noise. Row ``k``'s rollouts use the ``k``-th child of ``seed``
    (``SeedSequence(seed.entropy, spawn_key=seed.spawn_key + (k,))``, what
    ``seed.spawn`` would give on a fresh sequence), so the table is reproducible
    from ``seed`` alone and ``seed`` itself is not advanced.

    Parameters
    ----------
    grid : the grid (``planner.grid.Grid``).
    dynamics : the base ``planner.model.Dynamics``.
    policies : policy name -> greedy actions ``(n_states,)`` or Q table.
    noises, drift_scales : the levels to tabulate.
    budget, rollouts, max_rollout_steps, flag_z : as in :func:`evaluate`.
    seed : root of the rollouts' randomness; required when ``rollouts > 0``.
    model : an already built model of ``grid``; reused for the drift scale whose
        dynamics it was built with instead of being built again.
    progress : optional ``callable(done_rows, total_rows)``, called after each row.

    Returns
    -------
    list of RiskRow
    """
    if not policies:
        raise SettingsError("sensitivity needs at least one policy")
    if rollouts and seed is None:
        raise SettingsError("Monte Carlo rollouts need a seed (a numpy.random.SeedSequence or an int)")
    root = seed if isinstance(seed, np.random.SeedSequence) or seed is None else np.random.SeedSequence(seed)
    rows = []
    k = 0
    for scale in drift_scales:
        wanted = replace(dynamics, drift_scale=float(scale))
        scaled = model if model is not None and model.dynamics == wanted else build_model(grid, wanted)
        for name, policy in policies.items():
            for eps in noises:
                rng = None
                if rollouts:
                    child = np.random.SeedSequence(root.entropy, spawn_key=tuple(root.spawn_key) + (k,),
                                                   pool_size=root.pool_size)
                    rng = np.random.default_rng(child)
                rows.append(evaluate(scaled, policy, noise=float(eps), name=name, budget=budget, rollouts=rollouts,
                                     rng=rng, max_rollout_steps=max_rollout_steps, hazards=grid.hazards,
                                     flag_z=flag_z))
                k += 1
                if progress is not None:
                    progress(k, len(drift_scales) * len(policies) * len(noises))
    return rows


# ----------------------------------------------------------------------------- Monte Carlo


def find_row(rows: Iterable[RiskRow], policy: str, noise: float, drift_scale: float) -> RiskRow | None:
    """The row of ``policy`` at ``noise`` and ``drift_scale`` (compared with round-off slack), if any."""
    for row in rows:
        if row.policy == policy and math.isclose(row.noise, noise) and math.isclose(row.drift_scale, drift_scale):
            return row
    return None


def _with_monte_carlo(row: RiskRow, model: Model, action_probs, reaches, ends, n: int, rng, max_steps: int,
                      flag_z: float):
    end, steps, crossed = sample_runs(model, action_probs, n, rng, trapped=model.active & ~reaches,
                                   max_steps=max_steps)
    names = model.event_names
    mc = {
        "goal": mc_estimate(int(np.sum(end == EVENT_GOAL)), n),
        "incident": mc_estimate(int(np.sum(end >= EVENT_BOUNDARY)), n),
        "never": mc_estimate(int(np.sum(end == END_NEVER)), n),
    }
    for code in [EVENT_BOUNDARY] + [EVENT_HAZARD + h for h in np.flatnonzero(ends)]:
        mc[f"event:{names[code]}"] = mc_estimate(int(np.sum(end == code)), n)
    for h in np.flatnonzero(~ends):
        mc[f"entry:{names[EVENT_HAZARD + h]}"] = mc_estimate(int(np.sum((crossed >> h) & 1)), n)
    if row.budget is not None:
        in_time = steps <= row.budget
        mc["goal_within_budget"] = mc_estimate(int(np.sum((end == EVENT_GOAL) & in_time)), n)
        mc["incident_within_budget"] = mc_estimate(int(np.sum((end >= EVENT_BOUNDARY) & in_time)), n)
        mc["timeout"] = mc_estimate(int(np.sum(~((end > 0) & in_time))), n)
    exact = row.exact()
    disagrees = tuple(k for k, est in mc.items() if not est.contains(exact[k], flag_z))
    return replace(row, n_rollouts=n, n_truncated=int(np.sum(end == END_TRUNCATED)), mc=mc, mc_disagrees=disagrees,
                   mc_flag_z=flag_z)


# ----------------------------------------------------------------------------- formatting


def format_prob(p) -> str:
    """A probability in veerwise's one notation (:func:`planner.notation.probability`).

    Examples
    --------
    >>> [format_prob(p) for p in (0.0, 1.2e-4, 0.25, 0.999997, 3e-13)]
    ['0', '0.012% (1 in 8,300)', '25% (1 in 4.0)', '99.9997%', '< 1 in 10^12']
    """
    return notation.probability(p)


def _num(x, digits: int = 1) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-" if x is None or math.isnan(x) else ("inf" if x > 0 else "-inf")
    return f"{x:.{digits}f}"


def _plain(x):
    """A float for JSON: None for NaN/None, strings for infinities are not allowed."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


__all__ = [
    "DEFAULT_DRIFT_SCALES", "DEFAULT_NOISES", "Z95", "Absorption", "McEstimate", "RiskRow", "absorption",
    "evaluate", "format_prob", "incident_probability",
    "mc_estimate", "risk_map", "sample_runs", "seed_incidents", "sensitivity",
    # computed in planner.montecarlo, used with the rows
    "exact_interval", "table_flag_z",
]
