"""How veerwise writes numbers for people: one notation for every probability and ratio.

The summary, the risk table, the briefing and the figures all print probabilities
through :func:`probability` (and its parts :func:`percent` and :func:`one_in`), so a
reviewer reads one notation everywhere: a percentage, with "1 in N" beside it for
probabilities up to one half (above that "1 in 1.3" says nothing a percentage does
not), and "< 1 in 10^12" below the floor the solves can resolve. Ratios ("N times
less likely") and ranges over seeds come from :func:`times` and the ``*_range``
helpers. Nothing here computes a figure; it only writes one.

Files for programs (``risk.csv``, ``risk.json``, ``--json``) keep full floats.
"""

from __future__ import annotations

import math

#: Probabilities below this print as "< 1 in 10^12": the linear solves are not that accurate.
FLOOR = 1e-12
#: The floor in words, as every output prints it.
FLOOR_TEXT = "< 1 in 10^12"
#: Percentages are printed to this many significant figures.
DIGITS = 2
#: Percentages closer than this (in percent) to 0 or 100 print as "< 0.0001%" / "> 99.9999%";
#: the "1 in N" beside them carries the value.
PERCENT_LIMIT = 1e-4
#: "1 in N" is printed beside probabilities up to this (above it, N would be below 2).
ODDS_UP_TO = 0.5

_WORDS = ((1e12, "trillion"), (1e9, "billion"), (1e6, "million"))


def _missing(p) -> bool:
    return p is None or (isinstance(p, float) and math.isnan(p))


def _significant(x: float, digits: int = DIGITS) -> str:
    """``x > 0`` to ``digits`` significant figures in plain decimals (no exponent)."""
    exponent = math.floor(math.log10(x))
    decimals = max(0, digits - 1 - exponent)
    text = f"{round(x, decimals):.{decimals}f}"
    # rounding may carry into a new digit (0.0996 -> 0.10): drop a now-surplus decimal
    if decimals and len(text.replace(".", "").lstrip("0")) > digits:
        text = f"{round(x, decimals - 1):.{decimals - 1}f}"
    return text


def percent(p) -> str:
    """A probability as a percentage.

    Two significant figures up to 50%, above that as many decimals as show what is
    missing to 100%.

    Examples
    --------
    >>> [percent(p) for p in (0.0, 0.00091, 0.2193, 0.5, 0.9991, 0.99999999, 1.0)]
    ['0%', '0.091%', '22%', '50%', '99.91%', '> 99.9999%', '100%']
    """
    if _missing(p):
        return "-"
    p = float(p)
    if p <= 0.0:
        return "0%"
    if p >= 1.0:
        return "100%"
    pct = 100.0 * p
    if pct < PERCENT_LIMIT:
        return f"< {PERCENT_LIMIT:.4f}%"
    if p <= 0.5:
        return f"{_significant(pct)}%"
    rest = 100.0 - pct
    if rest < PERCENT_LIMIT:
        return f"> {100 - PERCENT_LIMIT:.4f}%"
    # one significant figure of what is missing to 100%: 99.91% is 0.09% short
    decimals = max(0, -math.floor(math.log10(rest)))
    text = f"{pct:.{decimals}f}"
    return ("> 99." + "9" * decimals if text.startswith("100") else text) + "%"


def count_words(n: float) -> str:
    """A large count to two significant figures: 1,100; 9.1 million; 2.3 billion."""
    for scale, word in _WORDS:
        if n >= scale:
            figure = _significant(n / scale)
            return f"{figure[:-2] if figure.endswith('.0') else figure} {word}"
    if n >= 10:
        digits = max(0, math.floor(math.log10(n)) - 1)
        return f"{round(n, -digits):,.0f}"
    return _significant(n)


def one_in(p) -> str:
    """"1 in N" for ``0 < p``; the floor as "< 1 in 10^12"; "" for 0, 1 or missing values."""
    if _missing(p):
        return ""
    p = float(p)
    if p <= 0.0 or p >= 1.0:
        return ""
    if p < FLOOR:
        return FLOOR_TEXT
    return f"1 in {count_words(1.0 / p)}"


def probability(p) -> str:
    """The one notation of probabilities: percent, and "1 in N" beside it up to one half.

    ``0`` prints as ``0``; values below :data:`FLOOR` as ``< 1 in 10^12``; ``None``
    and NaN as ``-``.

    Examples
    --------
    >>> [probability(p) for p in (0.0, 9.1e-4, 0.2193, 0.9991, 3e-13)]
    ['0', '0.091% (1 in 1,100)', '22% (1 in 4.6)', '99.91%', '< 1 in 10^12']
    """
    if _missing(p):
        return "-"
    p = float(p)
    if not 0.0 <= p <= 1.0:
        return f"{p:.3g} (not a probability)"  # shown as it is: a bug upstream must not be hidden
    if p == 0.0:
        return "0"
    if 0.0 < p < FLOOR:
        return FLOOR_TEXT
    if p > ODDS_UP_TO or p >= 1.0:
        return percent(p)
    return f"{percent(p)} ({one_in(p)})"


def probability_range(lo, hi) -> str:
    """A range of probabilities (e.g. over seeds): one figure when both print alike.

    Examples
    --------
    >>> probability_range(9.1e-4, 1.5e-3)
    '0.091% to 0.15% (1 in 1,100 to 1 in 670)'
    >>> probability_range(0.0021, 0.0021)
    '0.21% (1 in 480)'
    """
    if _missing(lo) or _missing(hi):
        return probability(hi if _missing(lo) else lo)
    lo, hi = sorted((float(lo), float(hi)))
    if probability(lo) == probability(hi):
        return probability(lo)
    if lo == 0.0 or lo < FLOOR or hi > ODDS_UP_TO:
        return f"{probability(lo)} to {probability(hi)}"
    share = percent(lo) if percent(lo) == percent(hi) else f"{percent(lo)} to {percent(hi)}"
    return f"{share} ({one_in(lo)} to {one_in(hi)})"


def times(ratio: float) -> str:
    """A ratio to two significant figures, in words a reader takes in at once (240; 1,100; 3.5)."""
    if not math.isfinite(ratio):
        return "infinitely many"
    if ratio >= 10:
        return count_words(ratio)
    return f"{ratio:.1f}"


def times_range(lo: float, hi: float) -> str:
    """A range of ratios: ``"240"`` when both ends print alike, else ``"120 to 480"``."""
    lo, hi = sorted((lo, hi))
    a, b = times(lo), times(hi)
    return a if a == b else f"{a} to {b}"


def ratio_range(safer: tuple[float, float], riskier: tuple[float, float]) -> tuple[float, float] | None:
    """How many times less likely, as a range: riskier over safer, each given as (lo, hi).

    The widest range the two intervals allow (``riskier.lo / safer.hi`` to
    ``riskier.hi / safer.lo``); None when the safer figure can be 0 (no finite ratio).
    """
    s_lo, s_hi = sorted(safer)
    r_lo, r_hi = sorted(riskier)
    if s_lo <= 0.0:
        return None
    return r_lo / s_hi, r_hi / s_lo


def hemisphere(lat: float, lon: float, digits: int = 5) -> str:
    """A position as latitude and longitude with hemisphere letters: ``47.40000 N, 9.25000 E``."""
    ns = "N" if lat >= 0 else "S"
    ew = "E" if lon >= 0 else "W"
    return f"{abs(lat):.{digits}f} {ns}, {abs(lon):.{digits}f} {ew}"


__all__ = [
    "FLOOR", "FLOOR_TEXT", "count_words", "hemisphere", "one_in", "percent", "probability", "probability_range",
    "ratio_range", "times", "times_range",
]
