"""Verdicts: how close a learned policy came to its exact reference.

A learned policy is converged only when its own exact P(incident) lies within its
reference's tie range (widened by a share or the Monte Carlo interval) and its expected
length agrees (:func:`risk_verdict`); :func:`convergence_report` adds the diagnostics:
agreement on visited states, the value gap, whether the seeds keep to one corridor.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from planner import checks
from planner.exact import LOOP_DISCOUNT, VISIT_FLOOR, ExactSolution, near_best
from planner.model import (
    Chain,
    Model,
    epsilon_greedy,
    policy_chain,
    reaches_absorption,
    reaching,
    solve_transient,
)
from planner.route import nominal_path
from planner.ties import (
    SafestChoice,
    _expected_metres,
    _incident,
    equally_good,
    incident_from_every_state,
    safest_among,
)


@dataclass(frozen=True)
class RiskVerdict:
    """Whether a learned policy's risk agrees with its exact reference.

    Attributes
    ----------
    converged : P(incident) inside the band and expected length within the share.
    p_incident : the learned policy's own exact P(incident), at the run's noise.
    reference_low, reference_high : the reference's tie range (safest and riskiest
        equally good policies).
    band_low, band_high : that range widened by ``max(rel_band, Monte Carlo 99 %
        half-width)``.
    length_m, reference_length_m : expected metres travelled until the run ends.
    seeds_low, seeds_high : range of the single seeds' own exact P(incident) (NaN
        when no seed policies were given).
    message : one plain sentence for the summary, ``risk.json`` and the briefing.
    """

    converged: bool
    p_incident: float
    reference_low: float
    reference_high: float
    band_low: float
    band_high: float
    length_m: float
    reference_length_m: float
    seeds_low: float
    seeds_high: float
    message: str


def risk_verdict(model: Model, greedy: np.ndarray, reference: SafestChoice, *, mc_halfwidth: float = 0.0,
                 seed_policies=(), seed_p_incident=None, rel_band: float = 0.10, length_share: float = 0.01,
                 fmt=None) -> RiskVerdict:
    """Judge a learned policy by its risk: converged only when it is as safe as the reference.

    Parameters
    ----------
    model : the model both policies live on.
    greedy : int ``(n_states,)``, the learned (delivered) policy.
    reference : :func:`safest_among` of the exact fixed point the learner aims at;
        its ``epsilon`` is the run's noise, at which both are evaluated.
    mc_halfwidth : half-width of the Monte Carlo 99 % interval of the learned policy's
        P(incident) (0 without rollouts).
    seed_policies : the single seeds' greedy policies, for the spread across seeds.
    seed_p_incident : their exact P(incident) at the reference's noise, when the caller
        has them already (used instead of solving ``seed_policies`` again).
    rel_band : relative widening of the reference range (10 %).
    length_share : largest relative excess of expected length still converged (1 %).
    fmt : how the message writes a probability (default: percent, 3 significant digits).

    Returns
    -------
    RiskVerdict
    """
    fmt = fmt or _pct
    eps = reference.epsilon
    chain = policy_chain(model, epsilon_greedy(greedy, model.n_actions, eps))
    p = float(_incident(model, chain)[model.start])
    length = _expected_metres(model, chain)
    lo, hi = reference.p_incident, reference.p_incident_max
    band_lo = max(0.0, lo - max(rel_band * lo, mc_halfwidth))
    band_hi = min(1.0, hi + max(rel_band * hi, mc_halfwidth))
    ref_len = reference.expected_m
    long_ok = math.isfinite(length) and length <= ref_len * (1.0 + length_share) + 1e-9
    risk_ok = band_lo - 1e-15 <= p <= band_hi + 1e-15
    if seed_p_incident is not None:
        seeds = [float(p) for p in seed_p_incident]
    else:
        seeds = [float(incident_from_every_state(model, g, eps, check=False)[model.start]) for g in seed_policies]
    seeds_lo, seeds_hi = (min(seeds), max(seeds)) if seeds else (math.nan, math.nan)
    ref = fmt(lo) if fmt(lo) == fmt(hi) else f"{fmt(lo)}, equally good routes {fmt(lo)} to {fmt(hi)}"
    if risk_ok and long_ok:
        message = f"converged: P(incident) {fmt(p)} (exact reference {ref}), {length:.1f} m (reference {ref_len:.1f} m)"
    else:
        why = f"P(incident) {fmt(p)}" + ("" if risk_ok else f" outside {fmt(band_lo)} to {fmt(band_hi)}") + \
            f" (exact reference {ref}), {length:.1f} m" + ("" if long_ok else
                                                           f", over {100 * length_share:g}% longer") + \
            f" (reference {ref_len:.1f} m)"
        message = f"NOT CONVERGED: {why}"
    if seeds:
        message += f"; single seeds {fmt(seeds_lo)} to {fmt(seeds_hi)}"
    return RiskVerdict(converged=bool(risk_ok and long_ok), p_incident=p, reference_low=lo, reference_high=hi,
                       band_low=band_lo, band_high=band_hi, length_m=float(length), reference_length_m=ref_len,
                       seeds_low=seeds_lo, seeds_high=seeds_hi, message=message)


def _pct(p: float) -> str:
    return f"{100 * p:.3g}%"


# ----------------------------------------------------------------------------- convergence report


@dataclass(frozen=True)
class Convergence:
    """How close a learned consensus policy is to its exact reference.

    Attributes
    ----------
    agreement : occupancy-weighted fraction of visited states where the learned
        greedy action is optimal for the reference (actions within
        ``ACTION_TOLERANCE`` of the best reference Q count as optimal).
    value_gap_m : reference V at the start minus the learned greedy policy's V at the
        start, both under the reference's noise (``inf`` when the learned policy can
        loop forever from the start).
    learned_value_m, reference_value_m : the two values behind the gap.
    seed_routes_matching : seeds whose greedy nominal route ends the same way as the
        consensus one and keeps within two cells of it (see :func:`same_corridor`).
    seeds_agreeing : seeds whose own greedy policy reaches ``threshold`` agreement on
        the states the consensus policy visits (ties make routes differ harmlessly;
        this count does not mind them).
    n_seeds : seeds trained.
    visited_states : states the consensus policy visits (occupancy above ``VISIT_FLOOR``).
    converged : ``agreement >= threshold`` and a value gap of at most ``gap_limit_m``
        (the consensus policy is what is exported; single seeds are only reported).
    message : one plain sentence for the briefing and the summary.
    """

    agreement: float
    value_gap_m: float
    learned_value_m: float
    reference_value_m: float
    seed_routes_matching: int
    seeds_agreeing: int
    n_seeds: int
    visited_states: int
    converged: bool
    message: str
    verdict: RiskVerdict | None = None

    def judged_by(self, verdict: RiskVerdict, *, used: str = "", advice: str = "") -> Convergence:
        """The report with the risk verdict as its verdict.

        Converged only when the risk agrees; the action agreement stays as a
        diagnostic. ``used`` says what training took (e.g. "2.6e+06 updates"),
        ``advice`` what to try when the verdict fails.
        """
        message = f"{verdict.message}; {100 * self.agreement:.0f}% of visited states agree with the reference"
        if used:
            message += f"; {used}"
        if advice and not verdict.converged:
            message += f"; {advice}"
        return dataclasses.replace(self, converged=verdict.converged, message=message, verdict=verdict)


def policy_value(model: Model, greedy: np.ndarray, epsilon: float) -> tuple[float, Chain, np.ndarray]:
    """Exact value at the start of ``greedy`` executed with noise ``epsilon``.

    Parameters
    ----------
    model : the model.
    greedy : int ``(n_states,)`` greedy action per state.
    epsilon : execution noise in [0, 1].

    Returns
    -------
    (value, chain, finite): the expected return from the start (``-inf`` when the run
    may never end from there), the :class:`planner.model.Chain`, and the bool mask of
    states whose value is finite (from them the run ends with probability 1).
    """
    chain = policy_chain(model, epsilon_greedy(greedy, model.n_actions, epsilon))
    ends = reaches_absorption(chain, model.active)
    trapped = model.active & ~ends
    finite = ends & ~reaching(chain.transient, trapped)
    if not finite[model.start]:
        return -math.inf, chain, finite
    v, _ = solve_transient(chain, chain.reward, finite)
    return float(v[model.start]), chain, finite


def occupancy(model: Model, chain: Chain, finite: np.ndarray) -> np.ndarray:
    """Expected visits to each state from the start: ``(I - T^T) x = e_start``.

    When the run may never end from the start (``finite[start]`` false) the visits
    are discounted by ``LOOP_DISCOUNT`` per move so that they stay finite.

    Parameters
    ----------
    model : the model.
    chain, finite : from :func:`policy_value`.

    Returns
    -------
    float64 ``(n_states,)``, expected visits (the start counts its first visit).
    """
    e_start = np.zeros(model.n_states)
    e_start[model.start] = 1.0
    if finite[model.start]:
        x, _ = solve_transient(chain, e_start, finite, transpose=True)
    else:
        damped = Chain(transient=chain.transient * LOOP_DISCOUNT, absorb=chain.absorb, reward=chain.reward,
                       move_m=chain.move_m)
        x, _ = solve_transient(damped, e_start, model.active, transpose=True)
    return np.maximum(x, 0.0)


def same_corridor(model: Model, a: np.ndarray, b: np.ndarray, cells: int = 2) -> bool:
    """Whether two cell paths keep within ``cells`` of each other (symmetric, king distance).

    Equal-cost routes that only swap the order of straight and diagonal moves differ
    cell by cell; they are the same route for a reviewer.
    """
    ra, ca = np.unravel_index(np.asarray(a), model.shape)
    rb, cb = np.unravel_index(np.asarray(b), model.shape)
    dist = np.maximum(np.abs(ra[:, None] - rb[None, :]), np.abs(ca[:, None] - cb[None, :]))
    return bool(dist.min(axis=1).max() <= cells and dist.min(axis=0).max() <= cells)


def convergence_report(model: Model, learned, reference: ExactSolution, epsilon: float, *,
                       threshold: float = 0.95, tie_m: float = 0.0, gap_limit_m: float = math.inf,
                       greedy: np.ndarray | None = None, seed_greedy=None) -> Convergence:
    """Compare a learned consensus policy with its exact reference.

    Parameters
    ----------
    model : the model both were computed on.
    learned : a :class:`planner.learn.Learned`.
    reference : :func:`optimal_q` for Q-learning, :func:`on_policy_q` for SARSA.
    epsilon : execution noise of the policy; the occupancy weights are its expected
        visits from the start when executed with this noise.
    threshold : agreement needed to call training converged.
    tie_m : actions whose exact value is within this many metres-equivalent of the
        best count as agreeing (``plan`` uses a quarter of a cell: a detour below the
        grid's resolution is not a disagreement).
    gap_limit_m : largest value gap at the start still called converged.
    greedy : the delivered consensus policy (by default the seeds' mean Q with exact
        ties broken by safety at ``epsilon``; ``plan`` passes the safest among the
        learned ties).
    seed_greedy : each seed's own policy (by default its Q, ties by safety).

    Returns
    -------
    Convergence

    Notes
    -----
    The value gap compares like with like: the learned greedy policy is evaluated
    exactly under the reference's own noise (``reference.epsilon``: 0 for the optimum),
    so the gap is >= 0 up to round-off and 0 when the learned policy is as good as the
    reference.
    """
    checks.number(threshold, "threshold", low=0.0, high=1.0, low_open=True)
    def safest(q):
        return safest_among(model, equally_good(q), epsilon, value=q, riskiest=False).greedy

    consensus = safest(learned.q_mean) if greedy is None else np.asarray(greedy, dtype=np.int64)
    if seed_greedy is None:
        seed_greedy = [safest(q) for q in learned.q]
    correct = near_best(reference.q, tie_m=tie_m)
    states = np.arange(model.n_states)

    policy_value_at_start, chain, finite = policy_value(model, consensus, epsilon)
    x = occupancy(model, chain, finite)
    visited = (x > VISIT_FLOOR) & model.active
    weight = np.where(visited, x, 0.0)
    total = weight.sum()

    def agree(greedy):
        return float((weight * correct[states, greedy]).sum() / total) if total > 0 else 0.0

    agreement = agree(consensus)
    if reference.epsilon == epsilon:
        learned_value = policy_value_at_start
    else:
        learned_value, _, _ = policy_value(model, consensus, reference.epsilon)
    reference_value = float(reference.v[model.start])
    gap = reference_value - learned_value if math.isfinite(learned_value) else math.inf

    route = nominal_path(model, consensus)
    matching, agreeing = 0, 0
    for own in seed_greedy:
        other = nominal_path(model, own)
        matching += int(other.end_event == route.end_event and same_corridor(model, other.states, route.states))
        agreeing += int(agree(own) >= threshold)
    n_seeds = int(learned.q.shape[0])
    # The exported policy is the consensus; single seeds are noisier and only reported.
    converged = agreement >= threshold and gap <= gap_limit_m
    pct = f"{100 * agreement:.0f}%"
    if converged:
        message = (f"converged: {pct} agreement with the exact solution on visited states, "
                   f"{max(gap, 0.0):.1f} m-equiv. from its value; {matching} of {n_seeds} seeds' routes "
                   "keep within 2 cells of its route")
    else:
        more = int(learned.settings.episodes * (2 if agreement >= 0.8 else 4))
        if not math.isfinite(gap):
            why = "the learned policy can loop forever from the start"
        elif agreement < threshold:
            why = f"only {pct} agreement with the exact solution on visited states"
        else:
            why = f"{gap:.1f} m-equiv. worse than the exact solution at the start (limit {gap_limit_m:.1f})"
        message = f"not converged: {why}; try --episodes {more}"
    return Convergence(
        agreement=agreement, value_gap_m=float(gap), learned_value_m=float(learned_value),
        reference_value_m=reference_value, seed_routes_matching=matching, seeds_agreeing=agreeing, n_seeds=n_seeds,
        visited_states=int(visited.sum()), converged=bool(converged), message=message,
    )


__all__ = ["Convergence", "RiskVerdict", "convergence_report", "occupancy", "policy_value", "risk_verdict",
           "same_corridor"]
