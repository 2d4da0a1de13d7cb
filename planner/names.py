"""Names are data: what a zone, start, goal or site name may be, and how it is written.

The one place that says what a name may be, and how a name is written safely into
each medium.

A name comes from a site file someone else drew; it reaches terminals, CSV files that
spreadsheets open, HTML, figures and file and column names. So it is checked once, on
loading (:func:`clean_name`, :func:`check_unique`), and escaped on the way out by the
function for that medium (:func:`csv_cell`, :func:`for_terminal`).

A name is at most :data:`MAX_NAME_CHARS` characters of printable text after Unicode
NFC normalisation: no control characters, no line breaks, no direction overrides or
marks, no zero-width characters, no lone surrogates. Names must stay distinct after
normalisation and after the mappings to file names (case-folded, punctuation runs
folded) and to table column names (a name plus the ``_lo``/``_hi`` of its interval).
"""

from __future__ import annotations

import re
import unicodedata

from planner.errors import SiteError

#: Longest name accepted, in characters (after NFC normalisation).
MAX_NAME_CHARS = 100
#: Suffixes the risk table appends to a name for its interval columns.
COLUMN_SUFFIXES = ("", "_lo", "_hi")
#: Cells starting with one of these are formulas to a spreadsheet (OWASP, "CSV Injection").
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")

_FOLD = re.compile(r"[\W_]+", re.UNICODE)


def describe_char(ch: str) -> str:
    """``U+202E (RIGHT-TO-LEFT OVERRIDE)``: a character named so that it cannot act."""
    return f"U+{ord(ch):04X} ({unicodedata.name(ch, unicodedata.category(ch))})"


def quoted(text: str, limit: int = 40) -> str:
    """``text`` as a short, quoted, escaped piece of a message (never acts on a terminal)."""
    shown = text if len(text) <= limit else text[:limit] + "..."
    return ascii(shown) if not shown.isprintable() else repr(shown)


def clean_name(raw, where: str) -> str:
    r"""The name ``raw`` NFC-normalised, or a :class:`SiteError` naming ``where`` and the rule.

    Examples
    --------
    >>> clean_name("North pond", "feature 3")
    'North pond'
    >>> clean_name("Cafe\u0301 corner", "feature 4") == "Caf\u00e9 corner"
    True
    """
    if not isinstance(raw, str):
        raise SiteError(f"{where}: 'name' must be a string")
    if len(raw) > 4 * MAX_NAME_CHARS:  # refuse before normalising: the work stays bounded
        raise SiteError(f"{where}: name is {len(raw):,} characters, over the {MAX_NAME_CHARS}-character limit")
    try:
        name = unicodedata.normalize("NFC", raw)
    except UnicodeError as err:  # pragma: no cover - str input always normalises
        raise SiteError(f"{where}: name is not valid Unicode text") from err
    if len(name) > MAX_NAME_CHARS:
        raise SiteError(f"{where}: name is {len(name):,} characters, over the {MAX_NAME_CHARS}-character limit")
    for i, ch in enumerate(name):
        if not ch.isprintable():
            raise SiteError(f"{where}: name {quoted(name)} has {describe_char(ch)} at character {i + 1}; names "
                            "must be printable text without control, line-break, direction or zero-width characters")
    if name != name.strip():
        raise SiteError(f"{where}: name {quoted(name)} starts or ends with a space; remove it")
    return name


def file_key(name: str) -> str:
    """The name as a case-insensitive file system sees a file named after it."""
    return _FOLD.sub("-", unicodedata.normalize("NFKC", name).casefold()).strip("-")


def column_names(name: str) -> tuple[str, ...]:
    """Every table column a zone's name yields (the name and its interval columns)."""
    return tuple(f"{name}{suffix}" for suffix in COLUMN_SUFFIXES)


def check_unique(named, source: str) -> None:
    """Refuse two names that are the same after normalisation, file naming or column naming.

    ``named`` is ``(label, name)`` pairs (the label says which feature a message blames).
    Linear in the number of names.
    """
    by_file: dict[str, str] = {}
    by_column: dict[str, tuple[str, str]] = {}
    for label, name in named:
        key = file_key(name) or name
        if key in by_file:
            raise SiteError(f"{source}: {label}: zone name {quoted(name)} is the same as {by_file[key]}'s once "
                            "case and punctuation are set aside (file names would clash); rename one")
        by_file[key] = label
    for label, name in named:
        for column in column_names(name):
            other = by_column.get(column)
            if other is not None and other[0] != label:
                raise SiteError(f"{source}: {label}: zone name {quoted(name)} and {other[0]}'s name "
                                f"{quoted(other[1])} give the same table column {quoted(column)}; rename one")
            by_column[column] = (label, name)


def csv_cell(text: str) -> str:
    """A text cell a spreadsheet shows as text, never runs as a formula.

    Cells starting with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return get a
    leading apostrophe, as OWASP's "CSV Injection" page advises; the CSV writer's
    quoting handles commas, quotes and line breaks.

    >>> csv_cell("=HYPERLINK(1)")
    "'=HYPERLINK(1)"
    >>> csv_cell("North pond")
    'North pond'
    """
    return f"'{text}" if text.startswith(FORMULA_STARTS) else text


def for_terminal(text: str) -> str:
    r"""``text`` with every non-printable character shown as an escape.

    Escape sequences, line breaks inside a line and direction overrides are shown as a
    ``\x``/``\u`` escape, so one line stays one line.
    """
    if text.isprintable():
        return text
    return "".join(ch if ch.isprintable() else ascii(ch)[1:-1] for ch in text)
