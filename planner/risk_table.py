"""The risk table for people and programs: text, markdown, csv and json.

Presentation only: the figures come from :mod:`planner.risk` (:class:`RiskRow`) and
:mod:`planner.gridcheck`; here they are laid out. Every probability goes through
:func:`planner.risk.format_prob` (the one notation of :mod:`planner.notation`).
"""

from __future__ import annotations

import csv
import io
import json
import math
import textwrap
from collections.abc import Iterable, Mapping

from planner import notation
from planner.errors import SettingsError
from planner.montecarlo import Z95
from planner.risk import FORMATS, RiskRow, _num, format_prob


def format_table(rows: Iterable[RiskRow], fmt: str = "text", *, details: bool = False) -> str:
    """The risk table as text (one line per row, under 100 columns), csv, json or markdown.

    Exact figures whose Monte Carlo interval does not contain them are marked ``!``
    in text and markdown, with a footnote; csv and json carry ``mc_disagrees``.
    JSON is plain data (no NaN: ``null``) with sorted keys.

    Parameters
    ----------
    rows : the rows (from :func:`evaluate` or :func:`sensitivity`).
    fmt : ``"text"``, ``"csv"``, ``"json"`` or ``"markdown"``.
    details : text only: follow each row with its zones' shares, entries, budget
        figures and Monte Carlo estimates.

    Returns
    -------
    str
    """
    rows = list(rows)
    if fmt not in FORMATS:
        raise SettingsError(f"risk_table.fmt must be one of {', '.join(FORMATS)}, got {fmt!r}")
    if fmt == "json":
        return json.dumps([r.as_dict() for r in rows], sort_keys=True, indent=2, allow_nan=False) + "\n"
    if fmt == "csv":
        return _format_csv(rows)
    if fmt == "markdown":
        return _format_markdown(rows)
    return _format_text(rows, details)


def _flat(row: RiskRow) -> dict:
    out = {
        "policy": row.policy, "noise": row.noise, "drift_scale": row.drift_scale, "p_goal": row.p_goal,
        "p_incident": row.p_incident,
    }
    out.update({f"p_event:{k}": v for k, v in row.p_by_event.items()})
    out.update({"p_never": row.p_never, "expected_moves": row.expected_moves, "expected_m": row.expected_m})
    out.update({"budget": row.budget, "p_goal_within_budget": row.p_goal_within_budget,
                "p_incident_within_budget": row.p_incident_within_budget, "p_timeout": row.p_timeout})
    out.update({f"p_entry:{k}": v for k, v in row.p_entry.items()})
    out.update({"n_rollouts": row.n_rollouts, "n_truncated": row.n_truncated})
    for k, m in row.mc.items():
        out.update({f"mc_{k}": m.estimate, f"mc_{k}_lo": m.lo, f"mc_{k}_hi": m.hi})
    out.update({"mc_disagrees": " ".join(row.mc_disagrees), "mc_flag_z": row.mc_flag_z, "residual": row.residual,
                "n_trapped_states": row.n_trapped_states})
    return out


def _format_csv(rows: list[RiskRow]) -> str:
    flat = [_flat(r) for r in rows]
    columns = []
    for f in flat:
        columns.extend(k for k in f if k not in columns)
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(columns)
    for f in flat:
        writer.writerow(["" if _blank(f.get(c)) else (repr(float(f[c])) if isinstance(f[c], float) else f[c])
                         for c in columns])
    return buf.getvalue()


def _blank(x) -> bool:
    return x is None or (isinstance(x, float) and math.isnan(x))


def _mark(row: RiskRow, key: str, text: str) -> str:
    return text + ("!" if key in row.mc_disagrees else "")


def _format_text(rows: list[RiskRow], details: bool = False) -> str:
    """The text table, one line per row.

    With ``details`` each row's incidents by zone, entries, budget figures and Monte
    Carlo estimates follow it, indented.
    """
    with_never = any(r.p_never > 0 for r in rows)
    with_mc = any(r.mc for r in rows)
    head = ["policy", "noise", "drift", "P(incident)", "P(goal)"] + (["P(never)"] if with_never else [])
    head += ["m|goal"] + (["Monte Carlo"] if with_mc else [])
    right = {"noise", "drift", "m|goal"}
    table = []
    for r in rows:
        cells = [r.policy, f"{r.noise:.2f}", f"{r.drift_scale:.2f}", _mark(r, "incident", format_prob(r.p_incident)),
                 _mark(r, "goal", notation.percent(r.p_goal))]
        if with_never:
            cells.append(_mark(r, "never", format_prob(r.p_never)))
        cells.append(_num(r.expected_m))
        if with_mc:
            cells.append("not run" if not r.mc else ("! differs" if r.mc_disagrees else "agrees"))
        table.append(cells)
    widths = [max(len(c) for c in col) for col in zip(head, *table, strict=True)]

    def line(cells):
        return " ".join(c.rjust(w) if h in right else c.ljust(w)
                        for h, c, w in zip(head, cells, widths, strict=True)).rstrip()

    header = line(head)
    lines = [header, "-" * len(header)]
    wrap = textwrap.TextWrapper(width=98, initial_indent="    ", subsequent_indent="      ",
                                break_on_hyphens=False)
    for r, cells in zip(rows, table, strict=True):
        lines.append(line(cells))
        if details:
            lines.extend(wrap.fill(d) for d in _row_details(r))
    if any(r.mc_disagrees for r in rows):
        lines.extend(_footnote(rows, 98))
    if not details:
        lines.append("(one line per row; --details adds each zone's share, entries and the Monte Carlo estimates)")
    return "\n".join(lines) + "\n"


def _budget_words(r: RiskRow) -> str:
    """'364.5 m (81 moves)': the travel budget in metres first, the moves it allows after.

    The metres are whole moves of the move length (a diagonal move travels farther).
    """
    if r.budget_m is None:
        return f"{r.budget} moves"
    return f"{r.budget_m:,.1f} m ({r.budget} moves of {r.budget_m / max(r.budget, 1):g} m)"


def _row_details(r: RiskRow) -> list[str]:
    details = []
    if r.p_by_event:
        parts = [f"{k} {_mark(r, f'event:{k}', format_prob(v))}" for k, v in r.p_by_event.items()]
        details.append("incidents: " + ", ".join(parts))
    if r.p_entry:
        parts = [f"{k} {_mark(r, f'entry:{k}', format_prob(v))}" for k, v in r.p_entry.items()]
        details.append("entries: " + ", ".join(parts))
    if r.budget is not None:
        details.append(
            f"within {_budget_words(r)}: goal {_mark(r, 'goal_within_budget', format_prob(r.p_goal_within_budget))}"
            f", incident {_mark(r, 'incident_within_budget', format_prob(r.p_incident_within_budget))}"
            f", timeout {_mark(r, 'timeout', format_prob(r.p_timeout))}"
        )
    details.append(f"expected moves given goal {_num(r.expected_moves)}; solve residual {r.residual:.1e}")
    if r.n_trapped_states:
        details.append(f"{r.n_trapped_states} states can never end the run under this policy")
    if r.mc:
        parts = [f"{_short_key(k)} {notation.percent(m.estimate)} [{notation.percent(m.lo)}, "
                 f"{notation.percent(m.hi)}]" for k, m in r.mc.items()]
        trunc = f", {r.n_truncated} truncated" if r.n_truncated else ""
        details.append(f"Monte Carlo ({r.n_rollouts:,} runs{trunc}, Clopper-Pearson 95%): " + "; ".join(parts))
    return details


def _footnote(rows: list[RiskRow], width: int | None) -> list[str]:
    levels = sorted({r.mc_flag_z for r in rows if r.mc_disagrees})
    if levels == [Z95]:
        text = ("! exact figure outside the 95% Clopper-Pearson interval of its Monte Carlo count. About 1 "
                "check in 20 misses by chance: one mark is weak evidence, many marks are strong.")
    else:
        z = ", ".join(f"{v:.2f}" for v in levels)
        text = (f"! exact figure outside the Clopper-Pearson interval of its Monte Carlo count at z = {z}: the "
                "level that keeps the whole table's checks at 95% together (the intervals shown are at 95% each).")
    return [text] if width is None else textwrap.wrap(text, width, subsequent_indent="  ")


def _short_key(key: str) -> str:
    return key.split(":", 1)[1] if ":" in key else key.replace("_within_budget", " in budget")


def _format_markdown(rows: list[RiskRow]) -> str:
    events = _union(r.p_by_event for r in rows)
    entries = _union(r.p_entry for r in rows)
    with_budget = any(r.budget is not None for r in rows)
    with_mc = any(r.mc for r in rows)
    head = ["policy", "noise", "drift", "P(goal)", "P(incident)"] + [f"P({e})" for e in events] + ["P(never)"]
    head += ["moves given goal", "metres given goal"]
    if with_budget:
        head += ["budget", "P(goal) in budget", "P(incident) in budget", "P(timeout)"]
    head += [f"P(entry {e})" for e in entries]
    if with_mc:
        head += ["MC runs", "MC P(goal) [95%]", "MC P(incident) [95%]"]
    lines = ["| " + " | ".join(head) + " |", "|" + "|".join("---" for _ in head) + "|"]
    flagged = False
    for r in rows:
        cells = [r.policy.replace("|", "/"), f"{r.noise:.2f}", f"{r.drift_scale:.2f}",
                 _mark(r, "goal", format_prob(r.p_goal)), _mark(r, "incident", format_prob(r.p_incident))]
        cells += [_mark(r, f"event:{e}", format_prob(r.p_by_event.get(e))) for e in events]
        cells += [_mark(r, "never", format_prob(r.p_never)), _num(r.expected_moves), _num(r.expected_m)]
        if with_budget:
            cells += ["-" if r.budget is None else str(r.budget),
                      _mark(r, "goal_within_budget", format_prob(r.p_goal_within_budget)),
                      _mark(r, "incident_within_budget", format_prob(r.p_incident_within_budget)),
                      _mark(r, "timeout", format_prob(r.p_timeout))]
        cells += [_mark(r, f"entry:{e}", format_prob(r.p_entry.get(e))) for e in entries]
        if with_mc:
            cells += [str(r.n_rollouts)] + [
                f"{notation.percent(r.mc[k].estimate)} [{notation.percent(r.mc[k].lo)}, "
                f"{notation.percent(r.mc[k].hi)}]" if k in r.mc else "-" for k in ("goal", "incident")
            ]
        flagged = flagged or bool(r.mc_disagrees)
        lines.append("| " + " | ".join(cells) + " |")
    if flagged:
        lines.append("")
        lines.append(" ".join(_footnote(rows, None)))
    return "\n".join(lines) + "\n"


def _union(dicts) -> list[str]:
    out = []
    for d in dicts:
        out.extend(k for k in d if k not in out)
    return out


def three_level_words(check: Mapping) -> str:
    """The third level of a grid check in words, or '' without one.

    'at quarter cell (1.125 m) 9.0% (1 in 11); observed order 3.1, extrapolated 8.9% (1 in 11),
    grid convergence index 0.18% (1 in 540)'.
    """
    if check.get("quarter_skipped"):
        return f"quarter-cell level skipped: {check['quarter_skipped']}"
    if check.get("p_incident_quarter") is None:
        return ""
    text = f"at quarter cell ({check['quarter_cell_m']:g} m) {format_prob(check['p_incident_quarter'])}"
    if check.get("order") is None:
        return text + "; the three figures do not converge monotonically, so no order or error estimate"
    return (text + f"; observed order {check['order']:.1f}, extrapolated {format_prob(check['extrapolated'])}, "
            f"grid convergence index {format_prob(check['gci'])}")
