"""Monte Carlo: sampled runs on the outcome table and the intervals that judge them.

Runs are sampled with the same outcome table every exact figure is solved from
(:func:`sample_runs`); a count of events is shown with its Clopper-Pearson (exact
binomial) interval (:class:`McEstimate`), and an exact figure is flagged only when it
falls outside that interval at the level that keeps a whole table's checks together
(:func:`table_flag_z`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from planner.errors import SettingsError
from planner.model import Model
from planner.outcomes import END_NEVER, END_TRUNCATED, EVENT_NONE

#: Normal quantile of a two-sided 95% interval.
Z95 = 1.959963984540054
#: Default cap on the moves of one Monte Carlo rollout.
DEFAULT_MAX_ROLLOUT_STEPS = 100_000
#: Slack when comparing an exact figure with its Monte Carlo interval (round-off only).
INTERVAL_SLACK = 1e-12


@dataclass(frozen=True)
class McEstimate:
    """A Monte Carlo estimate of one probability with its Clopper-Pearson 95% interval.

    Whether an exact figure agrees with the estimate is decided by :meth:`contains`
    with the same (exact binomial) interval, at the table-wide level of the flags.

    Attributes
    ----------
    count : rollouts where the event happened.
    n : rollouts made.
    estimate : ``count / n``.
    lo, hi : Clopper-Pearson interval at 95% (``z = 1.959963984540054``).
    """

    count: int
    n: int
    estimate: float
    lo: float
    hi: float

    def contains(self, p: float, z: float = Z95) -> bool:
        """Whether ``p`` is consistent with the count at the two-sided level of ``z``.

        Decided with the Clopper-Pearson (exact binomial) interval, which never covers
        less than its level (approximate intervals such as Wilson's can, at counts of a
        few events, exclude a true value far more often than their level says).
        """
        lo, hi = exact_interval(self.count, self.n, z)
        return lo - INTERVAL_SLACK <= p <= hi + INTERVAL_SLACK


def table_flag_z(n_checks: int, level: float = 0.95) -> float:
    """Normal quantile that keeps a whole table's checks at ``level`` together (Bonferroni).

    With ``n_checks`` independent 95% intervals, about one in twenty misses by chance;
    flagging at ``z = Phi^-1(1 - (1 - level) / (2 n_checks))`` keeps the chance of any
    false flag in the table below ``1 - level``.
    """
    from scipy.stats import norm

    n = max(1, int(n_checks))
    return float(norm.ppf(1.0 - (1.0 - level) / (2.0 * n)))


def exact_interval(count: int, n: int, z: float = Z95) -> tuple[float, float]:
    """Clopper-Pearson interval for ``count`` events in ``n`` trials.

    At the two-sided level of the normal quantile ``z`` (Clopper, C. J. and Pearson,
    E. S. (1934), Biometrika 26(4), 404-413).
    """
    from scipy.stats import beta, norm

    if n <= 0:
        return 0.0, 1.0
    alpha = 2.0 * float(norm.sf(z))
    lo = 0.0 if count <= 0 else float(beta.ppf(alpha / 2.0, count, n - count + 1))
    hi = 1.0 if count >= n else float(beta.isf(alpha / 2.0, count + 1, n - count))
    return lo, hi


def mc_estimate(count: int, n: int) -> McEstimate:
    """A :class:`McEstimate` from a count of ``n`` rollouts, with its Clopper-Pearson 95% interval."""
    if not (n > 0 and 0 <= count <= n):
        raise SettingsError(f"a Monte Carlo estimate needs 0 <= count <= n and n > 0, got {count} of {n}")
    lo, hi = exact_interval(count, n, Z95)
    return McEstimate(count=int(count), n=int(n), estimate=count / n, lo=lo, hi=hi)


def sample_runs(model: Model, action_probs: np.ndarray, n: int, rng: np.random.Generator, *,
             trapped: np.ndarray | None = None, max_steps: int = DEFAULT_MAX_ROLLOUT_STEPS):
    """Sample ``n`` runs of a stochastic policy from the start on the model's table.

    Parameters
    ----------
    trapped : bool ``(n_states,)``; a run entering such a state is stopped and counted
        as never ending (they cannot end the run; see :class:`Absorption`).
    max_steps : a run still going after this many moves is stopped (truncated).

    Returns
    -------
    end : int16 ``(n,)``, the event code that ended each run (``EVENT_GOAL``,
        ``EVENT_BOUNDARY``, ``EVENT_HAZARD + h``), 0 for never (trapped), -1 truncated.
    steps : int64 ``(n,)``, moves made.
    crossed : int64 ``(n,)``, bit mask of non-ending zones crossed by moves after
        which the run went on.
    """
    action_probs = np.asarray(action_probs, dtype=float)
    cum = np.cumsum(action_probs, axis=1)
    # The last action with positive probability takes any round-off shortfall, so the
    # sampler cannot fall off the end of the table nor pick an impossible action.
    positive = action_probs > 0
    last = action_probs.shape[1] - 1 - np.argmax(positive[:, ::-1], axis=1)
    cum[np.arange(cum.shape[1])[None, :] >= last[:, None]] = 1.0
    if trapped is None:
        trapped = np.zeros(model.n_states, dtype=bool)
    end = np.empty(n, dtype=np.int16)
    steps = np.empty(n, dtype=np.int64)
    crossed = np.empty(n, dtype=np.int64)
    _rollout_kernel(rng, int(model.start), cum, model.table(), np.ascontiguousarray(trapped, dtype=np.bool_),
                    int(max_steps), end, steps, crossed)
    return end, steps, crossed


@numba.njit(cache=True)
def _rollout_kernel(rng, start, cum, t, trapped, max_steps, out_end, out_steps, out_crossed):
    """Sample ``out_end.size`` runs from ``start`` on table ``t`` with cumulative action probabilities ``cum``."""
    n_a = cum.shape[1]
    for i in range(out_end.size):
        s = start
        steps = 0
        mask = np.int64(0)
        end = END_TRUNCATED
        while True:
            if trapped[s]:
                end = END_NEVER
                break
            if steps >= max_steps:
                break
            u = rng.random()
            a = n_a - 1
            for j in range(n_a):
                if u < cum[s, j]:
                    a = j
                    break
            k = s * n_a + a
            lo = t.offsets[k]
            hi = t.offsets[k + 1]
            u = rng.random()
            acc = 0.0
            o = hi - 1
            for j in range(lo, hi):
                acc += t.prob[j]
                if u < acc:
                    o = j
                    break
            steps += 1
            ev = t.event[o]
            if ev != EVENT_NONE:
                end = ev
                break
            mask |= t.crossed[o]
            s = t.next_state[o]
        out_end[i] = end
        out_steps[i] = steps
        out_crossed[i] = mask


__all__ = ["END_NEVER", "END_TRUNCATED", "McEstimate", "Z95", "exact_interval", "mc_estimate", "sample_runs",
           "table_flag_z"]
