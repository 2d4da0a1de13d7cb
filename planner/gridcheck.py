"""The grid-convergence check: the delivered policies re-evaluated on finer grids.

Each delivered policy, carried as a heading per position, is re-evaluated (not
re-planned) on a grid of half the cell size with the same move length, and with three
levels also a quarter; the figures, their difference, a flag, and (three levels) the
observed order, the Richardson-extrapolated figure and the grid convergence index.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from planner.errors import SettingsError
from planner.model import Model, build_model
from planner.montecarlo import exact_interval
from planner.risk import RiskRow, _plain, evaluate, find_row

#: A half-cell figure further than this share from the reported one is flagged (unless
#: the Monte Carlo interval of the reported figure is wider).
GRID_CHECK_SHARE = 0.10
#: Normal quantile of the Monte Carlo interval the half-cell check also allows (99%).
Z99 = 2.5758293035489004
#: Safety factor of the grid convergence index with three grids (Roache, Verification
#: and Validation in Computational Science and Engineering, 1998).
GCI_SAFETY = 1.25


@dataclass(frozen=True)
class GridCheck:
    """One delivered policy re-evaluated on a grid of half the cell, same move length.

    Attributes
    ----------
    policy, noise : the policy and the execution noise of both figures.
    cell_m, fine_cell_m : the reported grid's cell and the half cell.
    p_incident : P(incident) on the reported grid.
    p_incident_fine : the same policy's P(incident) on the half-cell grid (None when skipped).
    difference : ``p_incident_fine - p_incident``; relative : that over ``p_incident``
        (None when ``p_incident`` is 0).
    tolerance : ``max(GRID_CHECK_SHARE * p_incident, half-width of its 99% Monte Carlo
        interval)`` (:func:`mc_halfwidth`); flagged : ``|difference| > tolerance``.
    skipped : why the check was not made, or None.
    quarter_cell_m, p_incident_quarter : with three levels (``levels=3`` in
        :func:`half_cell_check`), the quarter cell and the figure there; order,
        extrapolated, gci : the observed order, the Richardson-extrapolated figure and the
        grid convergence index on the finest grid (:func:`richardson`; None when the three
        figures do not converge monotonically); quarter_skipped : why the third level was
        not computed, or None.
    """

    policy: str
    noise: float
    cell_m: float
    fine_cell_m: float
    p_incident: float
    p_incident_fine: float | None = None
    difference: float | None = None
    relative: float | None = None
    tolerance: float | None = None
    flagged: bool = False
    skipped: str | None = None
    quarter_cell_m: float | None = None
    p_incident_quarter: float | None = None
    order: float | None = None
    extrapolated: float | None = None
    gci: float | None = None
    quarter_skipped: str | None = None

    def as_dict(self) -> dict:
        """Plain data for JSON (None for NaN)."""
        return {k: _plain(v) if isinstance(v, float) else v for k, v in self.__dict__.items()}

    @classmethod
    def from_dict(cls, data: dict) -> GridCheck:
        """Inverse of :meth:`as_dict`, refusing a malformed record."""
        try:
            return cls(**{f: data[f] if f not in THIRD_LEVEL_FIELDS else data.get(f)
                          for f in cls.__dataclass_fields__})
        except (KeyError, TypeError) as err:
            raise SettingsError(f"a grid check record is malformed ({err!r})") from err


#: GridCheck fields of the third level; records written before it existed lack them.
THIRD_LEVEL_FIELDS = ("quarter_cell_m", "p_incident_quarter", "order", "extrapolated", "gci", "quarter_skipped")


def row_from_record(data: dict) -> RiskRow:
    """A risk row read back from ``risk.json``, its grid-check record checked field by field."""
    row = RiskRow.from_dict(data)
    if row.grid_check is None:
        return row
    return replace(row, grid_check=GridCheck.from_dict(row.grid_check).as_dict())


def carry_policy(coarse, coarse_active: np.ndarray, greedy: np.ndarray, fine) -> np.ndarray:
    """A policy carried as a heading per position from grid ``coarse`` to grid ``fine``.

    Each fine cell takes the heading of the coarse cell that contains its centre; where
    that coarse cell is not active (a hazard or outside there, not at the finer
    drawing) it takes the heading of the nearest active coarse cell. Both grids must
    share the heading set (same dynamics). Returns int64 ``(fine.n_cells,)``.
    """
    from scipy.ndimage import distance_transform_edt

    greedy = np.asarray(greedy, dtype=np.int64).reshape(coarse.shape)
    active = np.asarray(coarse_active, dtype=bool).reshape(coarse.shape)
    if active.any():
        _, (near_r, near_c) = distance_transform_edt(~active, return_indices=True)
        greedy = greedy[near_r, near_c]
    xs, ys = fine.centres()
    cols = np.clip(np.floor((xs - coarse.x0) / coarse.cell_m).astype(np.int64), 0, coarse.shape[1] - 1)
    rows = np.clip(np.floor((ys - coarse.y0) / coarse.cell_m).astype(np.int64), 0, coarse.shape[0] - 1)
    return greedy[rows, cols].ravel()


def half_cell_check(site, grid, spec, dynamics, model: Model, policies: Mapping[str, np.ndarray], rows, *,
                    noise: float, max_cells: int | None = None, levels: int = 2) -> list[GridCheck]:
    """Re-evaluate each delivered policy on a grid of half the cell size, same move length.

    With ``levels=3`` also on a quarter-cell grid, and estimate the discretisation
    error and observed order from the three figures (:func:`richardson`).

    Parameters
    ----------
    site, grid, spec, dynamics, model : the plan's site, grid, grid settings, vehicle and model.
    policies : name -> greedy actions on ``grid``.
    rows : the plan's risk rows (the reported figure and its Monte Carlo interval are
        read from the row of each policy at ``noise`` and the dynamics' drift scale).
    noise : execution noise of both figures.
    max_cells : refuse (skip, with the reason) a finer grid above this; default the spec's.
    levels : 2 (the reported and the half cell) or 3 (and the quarter cell).

    Returns
    -------
    list of GridCheck, one per policy, in the mapping's order.
    """
    fine_cell = grid.cell_m / 2.0
    move = dynamics.move_length_m(grid.cell_m)
    limit = spec.max_cells if max_cells is None else max_cells
    reported = {}
    for name in policies:
        row = find_row(rows, name, noise, dynamics.drift_scale)
        if row is None:
            raise SettingsError(f"half-cell check: no risk row for {name!r} at noise {noise:g}")
        reported[name] = row
    if levels not in (2, 3):
        raise SettingsError(f"grid check levels must be 2 or 3, got {levels!r}")
    fine, fine_model, skipped = _finer(site, grid, spec, dynamics, move, 2, "half", limit)
    quarter_cell = grid.cell_m / 4.0
    quarter = quarter_skipped = None
    if levels == 3 and skipped is None:
        quarter, quarter_model, quarter_skipped = _finer(site, grid, spec, dynamics, move, 4, "quarter", limit)
    out = []
    for name, greedy in policies.items():
        row = reported[name]
        base = GridCheck(policy=name, noise=float(noise), cell_m=float(grid.cell_m), fine_cell_m=fine_cell,
                         p_incident=float(row.p_incident))
        if skipped is not None:
            out.append(replace(base, skipped=skipped))
            continue
        carried = carry_policy(grid, model.active, greedy, fine)
        fine_row = evaluate(fine_model, carried, noise=float(noise), name=name, hazards=fine.hazards)
        check = compare_levels(base, float(fine_row.p_incident), row)
        if quarter is not None:
            # Carried from the reported grid, as the half-cell figure is: the same policy on all three.
            carried = carry_policy(grid, model.active, greedy, quarter)
            p_quarter = float(evaluate(quarter_model, carried, noise=float(noise), name=name,
                                       hazards=quarter.hazards).p_incident)
            fit = richardson([check.p_incident, check.p_incident_fine, p_quarter])
            check = replace(check, quarter_cell_m=quarter_cell, p_incident_quarter=p_quarter, order=fit["order"],
                            extrapolated=fit["extrapolated"], gci=fit["gci_fine"])
        elif quarter_skipped is not None:
            check = replace(check, quarter_cell_m=quarter_cell, quarter_skipped=quarter_skipped)
        out.append(check)
    return out


def _finer(site, grid, spec, dynamics, move: float, factor: int, word: str, limit: int):
    """The grid and model at ``1/factor`` of the cell (same move), or why they cannot be made.

    Returns ``(grid, model, None)`` or ``(None, None, reason)``.
    """
    from planner.errors import PlannerError
    from planner.grid import rasterise

    cell = grid.cell_m / factor
    n_cells = (factor * grid.shape[0]) * (factor * grid.shape[1])
    if n_cells > limit:
        return None, None, (f"the {word}-cell grid ({cell:g} m) would have about {n_cells:,} cells, over the cell "
                            f"limit of {limit:,}")
    try:
        finer = rasterise(site, replace(spec, cell_m=cell, max_cells=limit))
        return finer, build_model(finer, replace(dynamics, move_m=move)), None
    except PlannerError as err:
        return None, None, f"the {word}-cell grid ({cell:g} m) cannot be built: {err}"


def compare_levels(base: GridCheck, p_fine: float, row: RiskRow | None = None) -> GridCheck:
    """Fill in the fine figure, the differences and the flag of a :class:`GridCheck`."""
    diff = p_fine - base.p_incident
    tolerance = max(GRID_CHECK_SHARE * base.p_incident, mc_halfwidth(row))
    relative = diff / base.p_incident if base.p_incident > 0 else None
    return replace(base, p_incident_fine=p_fine, difference=diff, relative=relative, tolerance=tolerance,
                   flagged=bool(abs(diff) > tolerance))


def mc_halfwidth(row: RiskRow | None) -> float:
    """Half-width of the Clopper-Pearson 99 % interval of a row's Monte Carlo P(incident).

    The larger side from the estimate; 0 without rollouts.
    """
    mc = None if row is None else row.mc.get("incident")
    if mc is None or mc.n <= 0:
        return 0.0
    lo, hi = exact_interval(mc.count, mc.n, Z99)
    return max(mc.estimate - lo, hi - mc.estimate)


def richardson(values: Sequence[float], ratio: float = 2.0) -> dict:
    """Observed order, extrapolated value and grid convergence index from three grids.

    ``values`` are a figure on grids refined by ``ratio`` each time, coarsest first
    (Roache, Verification and Validation in Computational Science and Engineering,
    1998: ``p = ln((f3 - f2) / (f2 - f1)) / ln r`` with ``f1`` the finest,
    ``f_exact = f1 + (f1 - f2) / (r^p - 1)``, ``GCI = Fs |f1 - f2| / (r^p - 1)`` on the
    finest grid, ``Fs = 1.25``). Without monotone convergence (the differences change
    sign or do not shrink) the order and index are None.
    """
    if len(values) != 3:
        raise SettingsError(f"Richardson extrapolation needs three grids, got {len(values)}")
    f3, f2, f1 = (float(v) for v in values)
    d_coarse, d_fine = f2 - f3, f1 - f2
    out = {"values": [f3, f2, f1], "ratio_of_differences": None, "order": None, "extrapolated": None,
           "gci_fine": None}
    if d_coarse == 0.0:
        return out
    shrink = d_fine / d_coarse
    out["ratio_of_differences"] = shrink
    if not 0.0 < shrink < 1.0:
        return out
    order = math.log(1.0 / shrink) / math.log(ratio)
    factor = ratio**order - 1.0
    out.update(order=order, extrapolated=f1 + d_fine / factor, gci_fine=GCI_SAFETY * abs(d_fine) / factor)
    return out
