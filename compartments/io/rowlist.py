"""Error messages that name many rows at once ("rows 4, 9, 12, 15, 20 and 31 more")."""

from __future__ import annotations

from collections.abc import Sequence
from typing import NoReturn

from ..errors import DataError

SHOWN = 5


def rows_text(rows: Sequence[int]) -> str:
    """Name rows compactly: the first five and a count of the rest.

    Examples
    --------
    >>> rows_text([4])
    'row 4'
    >>> rows_text([4, 9, 12])
    'rows 4, 9 and 12'
    >>> rows_text(list(range(1, 40)))
    'rows 1, 2, 3, 4, 5 and 34 more'
    """
    rows = list(rows)
    if len(rows) == 1:
        return f"row {rows[0]}"
    if len(rows) <= SHOWN:
        return "rows " + ", ".join(str(r) for r in rows[:-1]) + f" and {rows[-1]}"
    return "rows " + ", ".join(str(r) for r in rows[:SHOWN]) + f" and {len(rows) - SHOWN} more"


#: Most names (columns, sheets) one message lists, and the longest name shown whole.
NAMES_SHOWN = 12
NAME_CHARS = 40


def names_text(names: Sequence[str], quote: bool = True) -> str:
    """Name columns or sheets compactly: the first twelve, each cut to 40 characters.

    Examples
    --------
    >>> names_text(["id", "time"])
    "'id', 'time'"
    >>> names_text([f"c{i}" for i in range(20)]).endswith("'c11' and 8 more")
    True
    """
    names = [str(n) for n in names]
    shown = [n if len(n) <= NAME_CHARS else n[: NAME_CHARS - 3] + "..." for n in names[:NAMES_SHOWN]]
    text = ", ".join(f"'{n}'" if quote else n for n in shown)
    if len(names) > NAMES_SHOWN:
        text += f" and {len(names) - NAMES_SHOWN} more"
    return text


def fail_rows(
    what: str, todo: str, path: str | None, rows: Sequence[int], column: str | None
) -> NoReturn:
    """Raise one :class:`DataError` for every row that shares a problem.

    ``what`` describes the first offending cell; when more rows share it the message
    lists them. The error's ``row`` is the first of them.
    """
    rows = list(rows)
    also = f" (same problem in {rows_text(rows)})" if len(rows) > 1 else ""
    raise DataError(f"{what}{also}; {todo}", path, rows[0] if rows else None, column)
