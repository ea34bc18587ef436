"""Per-subject columns: every column that plays no role and is constant within subjects."""

from __future__ import annotations

from .columns import ColumnRoles
from .formats import RawTable
from .notes import ReadNote
from .values import is_missing, parse_covariate


def read_covariates(
    table: RawTable, cols: ColumnRoles, subject: list[str], notes: list[ReadNote]
) -> tuple[dict[str, dict[str, object]], list[str]]:
    """Covariates of each subject.

    A column with at most one distinct non-empty text per subject is a covariate, named
    by its header without the unit; its value is an int, a float, a text or None. A
    column that changes within a subject is not used, and a note says so.

    Returns
    -------
    covariates : dict
        Subject id -> {covariate name: value}.
    names : list of str
        Covariate names in column order.

    Examples
    --------
    >>> from .formats import read_table
    >>> from .columns import resolve_columns
    >>> import pandas as pd
    >>> t = read_table(pd.DataFrame({"id": [1, 1, 2], "time": [0, 1, 0], "conc": [1, 2, 3], "Wt": [70, 70, 80]}))
    >>> read_covariates(t, resolve_columns(t.header, None, None, None), ["1", "1", "2"], [])
    ({'1': {'Wt': 70}, '2': {'Wt': 80}}, ['Wt'])
    """
    ids = list(dict.fromkeys(subject))
    out: dict[str, dict[str, object]] = {s: {} for s in ids}
    names: list[str] = []
    for j in cols.others():
        cells = table.columns[j]
        name = cols.names[j]
        varying = None
        first: dict[str, str] = {}
        for i, (s, text) in enumerate(zip(subject, cells, strict=False)):
            if is_missing(text):
                continue
            if s not in first:
                first[s] = text
            elif text != first[s] and varying is None:
                varying = (s, table.rows[i], text, first[s])
        if varying is not None:
            s, row, text, was = varying
            notes.append(ReadNote(None, cols.header[j], "flagged",
                                  f"not a covariate: it changes within subject {s} (row {row}: '{text}' after '{was}'); "
                                  "column not used"))
            continue
        if name in names or name in ("subject",):
            name = cols.header[j]
        names.append(name)
        for s in ids:
            out[s][name] = parse_covariate(first.get(s, ""))
    return out, names
