"""The settings of a plan: what ``plan`` needs besides the site file, checked when made.

:class:`PlanSettings` and its checks (counts, the root seed, the estimated memory of a
plan against what the machine has), and the plain-data record the manifest keeps of
them, read back by :func:`settings_from_record`.
"""

from __future__ import annotations

import dataclasses
import math
import os
from dataclasses import dataclass

from planner import checks
from planner.errors import RunFolderError, SettingsError


@dataclass(frozen=True)
class PlanSettings:
    """Everything ``plan`` needs besides the site file (recorded in the manifest)."""

    grid: object
    dynamics: object
    learn: object
    episodes_shortest: int | None = None
    noises: tuple[float, ...] = (0.0, 0.05, 0.1, 0.2)
    drift_scales: tuple[float, ...] = (1.0, 1.5, 2.0)
    budget_m: float | None = None
    budget_min: float | None = None
    speed_mps: float | None = None
    rollouts: int = 20000
    seed: int | None = None
    crs: str | None = None
    fix: bool = False
    max_bytes: int = 50_000_000
    alt_m: float | None = None
    convergence_threshold: float = 0.95
    tie_m: float = 0.01
    cautious_schedule: str = "sweeps"
    shortest_schedule: str = "sweeps"
    grid_check: bool = True
    grid_levels: int = 2
    #: the ``--settings`` file the options were read from, and its SHA-256, or None
    settings_file: str | None = None
    settings_sha256: str | None = None
    #: ``--risk-budget``: also deliver the shortest route with P(incident) at most this
    #: (at ``learn.epsilon`` and the planning drift); who set it (``--budget-set-by``).
    risk_budget: float | None = None
    budget_set_by: str | None = None

    def __post_init__(self):
        checks.probability(self.learn.epsilon, "PlanSettings.epsilon", high_open=True)
        checks.noise_levels(self.noises, "PlanSettings.noises")
        checks.drift_scales(self.drift_scales, "PlanSettings.drift_scales")
        # The headline figures, the verdicts and the grid check are read from the row at
        # the planning noise and drift: a table without it cannot carry them.
        if not any(math.isclose(n, self.learn.epsilon) for n in self.noises):
            raise SettingsError(f"PlanSettings.noises must include the planning noise PlanSettings.epsilon "
                                f"{self.learn.epsilon:g}: the headline figures are read from that row")
        if not any(math.isclose(m, self.dynamics.drift_scale) for m in self.drift_scales):
            raise SettingsError(f"PlanSettings.drift_scales must include the planning drift Dynamics.drift_scale "
                                f"{self.dynamics.drift_scale:g}: the headline figures are read from that row")
        checks.positive_metres(self.budget_m, "PlanSettings.budget_m", unset=True)
        if self.budget_min is not None:
            from planner.motion import travel_budget_m

            if not math.isclose(travel_budget_m(None, self.budget_min, self.speed_mps), self.budget_m or 0.0):
                raise SettingsError(f"PlanSettings.budget_min {self.budget_min:g} at PlanSettings.speed_mps "
                                    f"{self.speed_mps:g} is not PlanSettings.budget_m {self.budget_m!r}")
        checks.whole(self.rollouts, "PlanSettings.rollouts", low=0)
        checks.one_of(self.grid_levels, "PlanSettings.grid_levels", (2, 3))
        from planner.ties import check_tie_m

        check_tie_m(self.tie_m, "PlanSettings.tie_m")
        checks.seed(self.seed, "PlanSettings.seed")
        from planner.export import check_alt

        check_alt(self.alt_m, "PlanSettings.alt_m")
        checks.whole(self.max_bytes, "PlanSettings.max_bytes", low=1, says="a positive whole number of bytes")
        if self.risk_budget is not None or self.budget_set_by is not None:
            from planner.budget_plan import check_budget, check_set_by

            if self.risk_budget is None:
                raise SettingsError("PlanSettings.budget_set_by needs PlanSettings.risk_budget")
            check_budget(self.risk_budget)
            check_set_by(self.budget_set_by)
        check_counts({"LearnSettings.n_seeds": self.learn.n_seeds,
                      "LearnSettings.episodes": max(self.learn.episodes, self.episodes_shortest or 0),
                      "LearnSettings.max_steps": self.learn.max_steps, "PlanSettings.rollouts": self.rollouts,
                      "PlanSettings.budget_m": self.budget_m, "PlanSettings.noises": len(self.noises),
                      "PlanSettings.drift_scales": len(self.drift_scales)})
        from planner.site import MAX_PENALTY_M

        penalty = self.dynamics.hazard_penalty_m
        if penalty is not None and penalty > MAX_PENALTY_M:
            raise SettingsError(f"Dynamics.hazard_penalty_m must be at most {MAX_PENALTY_M:g} m (a penalty above "
                                f"it swamps every route and its costs lose precision), got {penalty:g}")


#: Upper bounds on counts, checked when the settings are made (before any work): far
#: beyond any useful plan, and low enough that no setting alone can run for days.
COUNT_LIMITS = {
    "LearnSettings.n_seeds": 100, "LearnSettings.episodes": 100_000_000, "LearnSettings.max_steps": 10_000_000,
    "PlanSettings.rollouts": 10_000_000, "PlanSettings.budget_m": 10_000_000, "PlanSettings.noises": 50,
    "PlanSettings.drift_scales": 50,
}
#: Counts that are list lengths (the message says "gives N values").
LIST_COUNTS = ("PlanSettings.noises", "PlanSettings.drift_scales")
#: Share of the memory the system reports available that one plan may plan to use.
MEMORY_SHARE = 0.8


def check_counts(counts: dict) -> None:
    """Refuse a count over its bound in :data:`COUNT_LIMITS` (``{setting: value}``; a list by its length)."""
    for name, value in counts.items():
        limit = COUNT_LIMITS[name]
        if value is not None and value > limit:
            what = f"gives {value:,} values" if name in LIST_COUNTS else f"{value:,} is"
            raise SettingsError(f"{name} {what}, over the limit of {limit:,}")


def available_memory_bytes() -> int | None:
    """Memory the system says is available now (Linux ``MemAvailable``), or None if unknown."""
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return None


def estimate_plan_bytes(grid, settings: PlanSettings) -> dict:
    """Upper estimates (bytes) of what ``plan`` holds at once, from the grid and settings alone.

    The model's outcome table (and as much again for the chain matrices of one
    policy), the Q tables of every seed of both learners (and the visit counts of a
    decaying step size), the per-episode learning curves, and one risk row's rollouts.
    """
    from planner.model import estimate_bytes

    learn = settings.learn
    s_a = grid.n_cells * settings.dynamics.n_actions
    episodes = max(learn.episodes, settings.episodes_shortest or 0)
    return {
        "model": 2 * estimate_bytes(grid, settings.dynamics),
        "Q tables": 2 * learn.n_seeds * s_a * 8 * (2 if learn.step_decay else 1) + 4 * s_a * 8,
        "learning curves": 2 * learn.n_seeds * episodes * (8 + 4 + 2),
        "rollouts": settings.rollouts * (2 + 8 + 8),
    }


def check_plan_size(grid, settings: PlanSettings) -> None:
    """Refuse, before allocating, a plan whose estimated memory is over what the machine has.

    The message gives the estimate, its largest part and the option that shrinks it.
    """
    from planner.errors import BudgetError
    from planner.grid import format_bytes

    parts = estimate_plan_bytes(grid, settings)
    total = sum(parts.values())
    available = available_memory_bytes()
    if available is None or total <= MEMORY_SHARE * available:
        return
    largest = max(parts, key=parts.get)
    option = {"model": "a larger GridSpec.cell_m",
              "Q tables": "a larger GridSpec.cell_m or fewer LearnSettings.n_seeds",
              "learning curves": "fewer LearnSettings.episodes or LearnSettings.n_seeds",
              "rollouts": "fewer PlanSettings.rollouts"}[largest]
    raise BudgetError(f"plan would need about {format_bytes(total)} of memory (most for the {largest}: "
                      f"{format_bytes(parts[largest])}), more than the {format_bytes(available)} available; "
                      f"use {option}")


def settings_record(settings: PlanSettings) -> dict:
    """Plain-data view of the settings for the manifest."""
    out = {}
    for f in dataclasses.fields(settings):
        value = getattr(settings, f.name)
        out[f.name] = dataclasses.asdict(value) if dataclasses.is_dataclass(value) else value
    out["noises"] = list(settings.noises)
    out["drift_scales"] = list(settings.drift_scales)
    return out


#: Types of the plain settings in a manifest (the nested ones are checked by their classes).
SETTING_TYPES = {
    "episodes_shortest": (int, type(None)), "budget_m": (int, float, type(None)),
    "budget_min": (int, float, type(None)), "speed_mps": (int, float, type(None)), "rollouts": (int,),
    "seed": (int, type(None)), "crs": (str, type(None)), "fix": (bool,), "max_bytes": (int,),
    "alt_m": (int, float, type(None)), "convergence_threshold": (int, float), "tie_m": (int, float),
    "cautious_schedule": (str,), "shortest_schedule": (str,),
    "grid_check": (bool,), "grid_levels": (int,),
    "settings_file": (str, type(None)), "settings_sha256": (str, type(None)),
    "risk_budget": (int, float, type(None)), "budget_set_by": (str, type(None)),
}


def settings_from_record(record: dict) -> PlanSettings:
    """Rebuild :class:`PlanSettings` from a manifest's ``settings``."""
    from planner.grid import GridSpec
    from planner.learn import LearnSettings
    from planner.motion import Dynamics

    try:
        rec = dict(record)
        rec["grid"] = GridSpec(**rec["grid"])
        rec["dynamics"] = Dynamics(**rec["dynamics"])
        rec["learn"] = LearnSettings(**rec["learn"])
        for key in ("noises", "drift_scales"):
            values = rec[key]
            if not (isinstance(values, list) and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                                     for v in values)):
                raise RunFolderError(f"manifest settings: {key!r} is not a list of numbers")
            rec[key] = tuple(values)
        for key, kinds in SETTING_TYPES.items():
            # run folders from before the risk budget have no budget settings
            value = rec.get(key) if key in rec or key not in ("risk_budget", "budget_set_by") else None
            if not isinstance(value, kinds) or (isinstance(value, bool) and bool not in kinds):
                raise RunFolderError(f"manifest settings: {key!r} is {value!r}, not of the type plan writes")
        return PlanSettings(**rec)
    except (KeyError, TypeError, AttributeError) as err:
        raise RunFolderError(f"manifest settings are incomplete or unknown ({err})") from err
    except SettingsError as err:
        raise RunFolderError(f"manifest settings are out of range ({err}); the run folder was changed") from err
    except (ValueError, OverflowError) as err:
        raise RunFolderError(f"manifest settings do not make valid settings ({err}); the run folder was "
                             "changed") from err
