"""Figures of training: the learning curves of both learners (``learning.png``).

Learners trained in episodes: return per episode (moving average, mean and range
over seeds) and the share of episodes that ended in an incident. Learners trained in
sweeps: each seed's greedy value at the start and the exact P(incident) of the
delivered policy at each check of the risk verdict, against the updates made. Drawn
in the private matplotlib context of :mod:`planner.plots`.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from planner import plots, style  # noqa: E402


def _moving_average(values: np.ndarray, window: int) -> np.ndarray:
    """Trailing moving average along the last axis (the first points average fewer)."""
    csum = np.cumsum(values, axis=-1)
    out = np.empty_like(csum, dtype=float)
    n = values.shape[-1]
    idx = np.arange(n)
    lo = np.maximum(idx - window, -1)
    upper = csum[..., idx]
    lower = np.where(lo >= 0, csum[..., np.maximum(lo, 0)], 0.0)
    out[...] = (upper - lower) / (idx - lo)
    return out


@plots.styled
def plot_learning(learned: dict, path, *, title: str = "Learning curves") -> Path:
    """Learning curves of both learners.

    Return per episode (moving average; mean and min-max band over seeds), and hazard
    incidents per episode during training.
    """
    episodic = {n: r for n, r in learned.items() if r.settings.schedule == "episodes"}
    swept = {n: r for n, r in learned.items() if r.settings.schedule == "sweeps"}
    rows = (2 if episodic else 0) + (2 if swept else 0)
    fig, axes = plt.subplots(rows, 1, figsize=(7.5, 6.2) if not (episodic and swept) else (7.5, 10.4),
                             dpi=style.FIGURE_DPI,
                             gridspec_kw={"height_ratios": ([2.2, 1.0] if episodic else [])
                                          + ([1.4, 1.4] if swept else [])})
    axes = np.atleast_1d(axes)
    if swept:
        axes[-1].sharex(axes[-2])
        _sweep_value_panel(axes[-2], swept, title if not episodic else None)
        _sweep_panel(axes[-1], swept, None)
    if not episodic:
        return _save_learning(fig, path)
    ax1, ax2 = axes[0], axes[1]
    ax2.sharex(ax1)
    for name, result in episodic.items():
        look = style.POLICY[name]
        n_ep = result.returns.shape[1]
        window = max(1, n_ep // 50)
        x = np.arange(1, n_ep + 1)
        smooth = _moving_average(result.returns, window)
        ax1.fill_between(x, smooth.min(axis=0), smooth.max(axis=0), color=look["color"], alpha=0.18, lw=0)
        ax1.plot(x, smooth.mean(axis=0), color=look["color"], ls=look["linestyle"], lw=1.6,
                 label=f"{look['label']}: mean of {result.returns.shape[0]} seeds")
        incidents = (result.ends >= 2).astype(float)  # boundary or an ending hazard
        ax2.plot(x, _moving_average(incidents, window).mean(axis=0), color=look["color"], ls=look["linestyle"],
                 lw=1.4, label=look["label"])
    ax1.set_ylabel(f"return per episode (m-equiv.)\nmoving average over {window} episodes")
    ax1.set_title(title, loc="left", fontsize=style.FONT_SIZE + 2)
    ax1.legend(fontsize=style.FONT_SIZE - 1, loc="lower right")
    ax1.grid(alpha=0.3)
    ax2.set_ylabel("episodes ending\nin an incident")
    from matplotlib.ticker import PercentFormatter

    ax2.yaxis.set_major_formatter(PercentFormatter(1.0, decimals=0))
    ax2.set_xlabel("episode")
    ax2.set_ylim(bottom=0)
    ax2.grid(alpha=0.3)
    ax2.legend(fontsize=style.FONT_SIZE - 1, loc="upper right")
    return _save_learning(fig, path)


def _plain_log_ticks(axis) -> None:
    """Decades written as plain text ("1e6"): figures draw without mathtext."""
    from matplotlib.ticker import FuncFormatter, NullFormatter

    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.0e}".replace("e+0", "e").replace("e+", "e")))
    axis.set_minor_formatter(NullFormatter())


def _sweep_value_panel(ax, swept: dict, title: str | None) -> None:
    """Learners trained in sweeps: each seed's greedy value at the start at each check.

    The mean over seeds as a line and the range over seeds as a band, against the
    updates made (all seeds together), on the axis the P(incident) panel shares.
    """
    for name, result in swept.items():
        look = style.POLICY[name]
        values = np.asarray(result.check_value, dtype=float)
        x = np.asarray(result.check_updates, dtype=float)
        if values.size == 0:
            continue
        ax.fill_between(x, values.min(axis=0), values.max(axis=0), color=look["color"], alpha=0.18, lw=0)
        ax.plot(x, values.mean(axis=0), color=look["color"], ls=look["linestyle"], lw=1.6,
                label=f"{look['label']}: mean of {values.shape[0]} seeds")
    ax.set_xscale("log")
    _plain_log_ticks(ax.xaxis)
    ax.set_ylabel("greedy value at the start\n(m-equiv., minus the cost)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=style.FONT_SIZE - 1, loc="best")
    if title:
        ax.set_title(title, loc="left", fontsize=style.FONT_SIZE + 2)


def _sweep_panel(ax, swept: dict, title: str | None) -> None:
    """Learners trained in sweeps.

    The consensus policy's exact P(incident) at each check of the stopping rule, against
    the updates made (all seeds together).
    """
    for name, result in swept.items():
        look = style.POLICY[name]
        p = np.asarray(result.check_p_incident, dtype=float)
        x = np.asarray(result.check_updates, dtype=float)
        ax.plot(x, np.maximum(p, 1e-12), color=look["color"], ls=look["linestyle"], lw=1.6, marker="o", ms=3.5,
                label=f"{look['label']}: {result.q.shape[0]} seeds, "
                      + (f"verdict converged at {x[-1]:.2g} updates" if result.stopped_by_rule and x.size
                         else "not converged, whole budget used"))
    ax.set_xscale("log")
    ax.set_yscale("log")
    from matplotlib.ticker import FuncFormatter

    from planner.notation import percent

    # probabilities in the one notation; minor ticks labelled only when no decade is in view
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: percent(v)))
    shown = [p for r in swept.values() for p in np.asarray(r.check_p_incident, dtype=float) if np.isfinite(p)]
    if shown and max(shown) < 10 * max(min(shown), 1e-12):
        ax.yaxis.set_minor_formatter(FuncFormatter(lambda v, _: percent(v)))
    _plain_log_ticks(ax.xaxis)
    ax.set_xlabel("updates (one sampled transition each, all seeds)")
    ax.set_ylabel("P(incident) of the\ngreedy policy (exact)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=style.FONT_SIZE - 1, loc="best")
    if title:
        ax.set_title(title, loc="left", fontsize=style.FONT_SIZE + 2)


def _save_learning(fig, path) -> Path:
    fig.text(0.01, 0.005, style.FIGURE_NOTICE + "; band = range over seeds", fontsize=style.FONT_SIZE - 2,
             color="#666666")
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path, dpi=style.FIGURE_DPI, metadata={"Software": None}, bbox_inches="tight", pad_inches=0.12)
    plt.close(fig)
    return path
