"""One cell of text to a number, a censored value, a route or a date-time.

Missing: an empty cell, ``NA``, ``N/A``, ``null`` or ``None`` (any case).
Below the limit of quantification: ``<0.1`` (the limit is 0.1), or one of the words
``BLQ``, ``BQL``, ``BLOQ``, ``ND``, ``<LLOQ``, ``<LOQ``, ``below LLOQ``, ``below LOQ``
(any case), whose limit must come from an ``lloq`` column.
Not finite: ``nan``, ``inf``, ``infinity`` (any sign, any case) and numbers too large
for a float (``1e400``) are refused; leave the cell empty for a missing value.
"""

from __future__ import annotations

import re
from datetime import datetime

MISSING = frozenset({"", "na", "n/a", "null", "none"})
NOT_FINITE = frozenset({"nan", "inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"})
BLQ_WORDS = frozenset({"blq", "bql", "bloq", "nd", "<lloq", "<loq", "below lloq", "below loq"})
ROUTE_WORDS = {
    "iv": "iv", "i.v.": "iv", "bolus": "iv", "intravenous": "iv", "iv bolus": "iv",
    "oral": "oral", "po": "oral", "p.o.": "oral", "by mouth": "oral",
    "infusion": "infusion", "inf": "infusion", "iv infusion": "infusion",
}
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_BELOW = re.compile(r"^<\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)$")

# kinds of a parsed cell
NUMBER, EMPTY, BAD, NONFINITE, BELOW_WORD, BELOW_LIMIT = range(6)


def is_missing(text: str) -> bool:
    """True for an empty cell or a missing-value word.

    Examples
    --------
    >>> is_missing(""), is_missing("NA"), is_missing("0")
    (True, True, False)
    """
    return text.strip().lower() in MISSING


def parse_number(text: str) -> tuple[int, float]:
    """Classify a cell as a plain number.

    Returns
    -------
    kind : int
        ``NUMBER``, ``EMPTY``, ``NONFINITE`` or ``BAD``.
    value : float
        The number (nan unless ``kind == NUMBER``).

    Examples
    --------
    >>> parse_number("2.5e-1"), parse_number("NA")[0] == EMPTY, parse_number("1,5")[0] == BAD
    ((0, 0.25), True, True)
    """
    t = text.strip()
    if _NUMBER.match(t):
        v = float(t)
        if v in (float("inf"), float("-inf")):  # e.g. 1e400: too large for a float
            return NONFINITE, float("nan")
        return NUMBER, v
    low = t.lower()
    if low in MISSING:
        return EMPTY, float("nan")
    if low in NOT_FINITE:
        return NONFINITE, float("nan")
    return BAD, float("nan")


def parse_measurement(text: str) -> tuple[int, float]:
    """Classify a cell of the value column.

    Returns
    -------
    kind : int
        ``NUMBER``, ``EMPTY``, ``NONFINITE``, ``BAD``, ``BELOW_WORD`` (a word such as
        BLQ; value nan) or ``BELOW_LIMIT`` (``<0.1``; value is the limit).
    value : float

    Examples
    --------
    >>> parse_measurement("<0.1") == (BELOW_LIMIT, 0.1), parse_measurement("bql")[0] == BELOW_WORD
    (True, True)
    """
    kind, value = parse_number(text)
    if kind != BAD:
        return kind, value
    t = " ".join(text.strip().lower().split())
    if t in BLQ_WORDS:
        return BELOW_WORD, float("nan")
    m = _BELOW.match(t)
    if m:
        limit = float(m.group(1))
        if limit in (float("inf"), float("-inf")):
            return NONFINITE, float("nan")
        return BELOW_LIMIT, limit
    return BAD, float("nan")


def parse_route(text: str) -> str | None:
    """Route word to ``"iv"``, ``"oral"`` or ``"infusion"``; None for an unknown word.

    Examples
    --------
    >>> parse_route("PO"), parse_route("Intravenous"), parse_route("INF"), parse_route("nasal")
    ('oral', 'iv', 'infusion', None)
    """
    return ROUTE_WORDS.get(" ".join(text.strip().lower().split()))


def parse_clock(text: str) -> datetime | None:
    """An ISO 8601 date-time (``2024-03-01 08:30``, ``2024-03-01T08:30:00Z``), else None.

    Examples
    --------
    >>> parse_clock("2024-03-01 08:30"), parse_clock("8.5")
    (datetime.datetime(2024, 3, 1, 8, 30), None)
    """
    t = text.strip()
    if len(t) < 10 or t[4:5] != "-":
        return None
    try:
        return datetime.fromisoformat(t)
    except ValueError:
        return None


def parse_covariate(text: str) -> object:
    """A covariate cell: int, float, text, or None when missing.

    Examples
    --------
    >>> parse_covariate("7"), parse_covariate("79.6"), parse_covariate(">= 5"), parse_covariate("")
    (7, 79.6, '>= 5', None)
    """
    t = text.strip()
    if t.lower() in MISSING:
        return None
    if re.fullmatch(r"[+-]?\d+", t):
        return int(t)
    kind, value = parse_number(t)
    if kind == NUMBER:
        return value
    return t
