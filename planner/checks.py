"""The value rules every setting is checked by, each written once.

A setting is named as its owner and field, ``Dynamics.slip`` or ``GridSpec.cell_m``,
so that a library user is told which argument to change; the command line turns
those names into its own option names (``--slip``) in :mod:`planner.cli.option_names`.
A function's own argument is named by itself (``epsilon``).

Every rule raises :class:`~planner.errors.SettingsError` with one line:
``NAME must be WHAT, got VALUE``.

>>> number(0.5, "Dynamics.slip", low=0, high=1)
0.5
>>> number(2, "Dynamics.slip", low=0, high=1)
Traceback (most recent call last):
...
planner.errors.SettingsError: Dynamics.slip must be a number in [0, 1], got 2
"""

from __future__ import annotations

import math

import numpy as np

from planner.errors import SettingsError

#: Largest root seed: the 128 bits of entropy ``SeedSequence`` draws when no seed is
#: given, so every run's recorded entropy can be given back as a seed.
MAX_SEED = 2**128 - 1


def is_number(value) -> bool:
    """A finite real number (numpy scalars too), not a bool."""
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool) \
        and math.isfinite(value)


def is_whole(value) -> bool:
    """A whole number (Python or numpy int), not a bool."""
    return isinstance(value, (int, np.integer)) and not isinstance(value, bool)


def interval(low, high, *, low_open: bool = False, high_open: bool = False) -> str:
    """'[0, 1)', '(0, inf)' as text, for messages.

    >>> interval(0, 1, high_open=True)
    '[0, 1)'
    """
    left = "(" if low_open or low is None else "["
    right = ")" if high_open or high is None else "]"
    lo = "-inf" if low is None else f"{low:g}"
    hi = "inf" if high is None else f"{high:g}"
    return f"{left}{lo}, {hi}{right}"


def _inside(value, low, high, low_open: bool, high_open: bool) -> bool:
    if low is not None and (value < low or (low_open and value == low)):
        return False
    return not (high is not None and (value > high or (high_open and value == high)))


def number(value, name: str, *, low=None, high=None, low_open: bool = False, high_open: bool = False,
           says: str | None = None, unset: bool = False):
    """``value`` if it is a finite number in the interval, else a :class:`SettingsError`.

    Parameters
    ----------
    name : the setting (``Dynamics.slip``) or argument the message names.
    low, high : ends of the interval (``None``: unbounded); ``low_open``/``high_open``
        leave an end out.
    says : what the message says the value must be, instead of "a number in [low, high]".
    unset : ``None`` is allowed (and returned).
    """
    if value is None and unset:
        return None
    if not (is_number(value) and _inside(value, low, high, low_open, high_open)):
        what = says or f"a number in {interval(low, high, low_open=low_open, high_open=high_open)}"
        raise SettingsError(f"{name} must be {what}{' (or unset)' if unset else ''}, got {value!r}")
    return value


def whole(value, name: str, *, low=None, high=None, says: str | None = None, unset: bool = False):
    """``value`` if it is a whole number in ``[low, high]``, else a :class:`SettingsError`."""
    if value is None and unset:
        return None
    if not (is_whole(value) and _inside(value, low, high, False, False)):
        if says is None:
            says = (f"a whole number >= {low}" if high is None else
                    f"a whole number in [{low}, {high}]" if low is not None else f"a whole number <= {high}")
        raise SettingsError(f"{name} must be {says}{' (or unset)' if unset else ''}, got {value!r}")
    return value


def one_of(value, name: str, choices) -> object:
    """``value`` if it is one of ``choices``, else a :class:`SettingsError` listing them."""
    if isinstance(value, bool) or value not in choices:
        listed = [repr(c) for c in choices]
        said = " or ".join(listed) if len(listed) <= 2 else ", ".join(listed[:-1]) + " or " + listed[-1]
        raise SettingsError(f"{name} must be {said}, got {value!r}")
    return value


def probability(value, name: str, *, high_open: bool = False):
    """A probability: a finite number in [0, 1] (or [0, 1) with ``high_open``)."""
    return number(value, name, low=0.0, high=1.0, high_open=high_open)


def drift_scale(value, name: str):
    """A drift scale: a finite number >= 0 (1 = as forecast, 0 = no drift)."""
    return number(value, name, low=0.0, says="a finite number >= 0")


def positive_metres(value, name: str, *, unset: bool = False):
    """A length: a finite number of metres > 0."""
    return number(value, name, low=0.0, low_open=True, says="a positive number of metres", unset=unset)


def noise_levels(values, name: str) -> tuple[float, ...]:
    """Execution noise levels of a risk table: at least one, each in [0, 1)."""
    values = tuple(values)
    if not values:
        raise SettingsError(f"{name} needs at least one noise level")
    for v in values:
        probability(v, name, high_open=True)
    return values


def drift_scales(values, name: str) -> tuple[float, ...]:
    """Drift scales of a risk table: at least one, each a finite number >= 0."""
    values = tuple(values)
    if not values:
        raise SettingsError(f"{name} needs at least one drift scale")
    for v in values:
        drift_scale(v, name)
    return values


#: The rule of each list-valued setting.
LIST_RULES = {"PlanSettings.noises": noise_levels, "PlanSettings.drift_scales": drift_scales}


def seed(value, name: str) -> None:
    """A root seed: unset or a whole number in [0, 2**128)."""
    if value is not None and not (is_whole(value) and 0 <= value <= MAX_SEED):
        shown = repr(value) if not is_whole(value) or int(value).bit_length() < 200 else "a larger number"
        raise SettingsError(f"{name} must be a whole number in [0, 2**128), got {shown}")
