"""The one notation of probabilities: what it prints reads back as the value it was given."""

from __future__ import annotations

import re

from hypothesis import given
from hypothesis import strategies as st

from planner.notation import FLOOR, hemisphere, one_in, percent, probability

_WORDS = {"million": 1e6, "billion": 1e9, "trillion": 1e12}


def _read_one_in(text: str) -> float:
    m = re.fullmatch(r"1 in ([\d.,]+)(?: (million|billion|trillion))?", text)
    assert m, text
    return float(m.group(1).replace(",", "")) * _WORDS.get(m.group(2), 1.0)


@given(st.floats(min_value=FLOOR, max_value=0.5, allow_nan=False))
def test_one_in_n_reads_back_to_two_significant_figures(p):
    n = _read_one_in(one_in(p))
    # two significant figures: within half a unit of the second digit, i.e. 5% of N
    assert abs(n - 1.0 / p) <= 0.05 * (1.0 / p) + 1e-9


@given(st.floats(min_value=1e-6, max_value=1 - 1e-6, allow_nan=False))
def test_percent_reads_back_within_its_printed_precision(p):
    text = percent(p)
    if text.startswith(("<", ">")):
        return
    value = float(text.rstrip("%")) / 100.0
    decimals = len(text.rstrip("%").partition(".")[2])
    # rounding to the printed decimals of a percentage, and no further
    assert abs(value - p) <= 0.5 * 10 ** (-decimals) / 100.0 + 1e-15


@given(st.floats(min_value=0.0, max_value=1.0, allow_nan=False))
def test_every_probability_prints_in_one_of_the_forms(p):
    text = probability(p)
    assert re.fullmatch(r"0|< 1 in 10\^12|(< )?[\d.]+% \(1 in [\d.,]+( million| billion| trillion)?\)"
                        r"|(> )?[\d.]+%", text), text
    assert "e-" not in text and "e+" not in text


def test_hemisphere_letters():
    assert hemisphere(-33.86, 151.21) == "33.86000 S, 151.21000 E"
    assert hemisphere(39.861, -4.132, 3) == "39.861 N, 4.132 W"
