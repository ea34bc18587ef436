"""The columns of a :class:`RawTable` parsed into per-row arrays.

Every cell of every role column is checked here; all rows sharing a problem are named
in one :class:`DataError`. Values below the limit of quantification are resolved here
according to ``blq`` (``"censor"``, ``"drop"`` or ``"half"``), with a note per row.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime

import numpy as np
from numpy.typing import NDArray

from . import values as V
from .columns import ColumnRoles
from .formats import RawTable
from .notes import ReadNote
from .rowlist import fail_rows, rows_text
from .units import time_factor

BLQ_MODES = ("censor", "drop", "half")


@dataclass
class Records:
    """Per-row arrays of a study table (one entry per data row, in file order).

    Times are in the study's time-axis unit; ``rate`` is per axis unit. Arrays of
    optional roles are None when the file has no such column.
    """

    rows: NDArray[np.int64]
    subject: list[str]
    time: NDArray[np.float64]
    is_obs: NDArray[np.bool_]
    value: NDArray[np.float64]
    censored: NDArray[np.bool_]
    lloq: NDArray[np.float64]
    observable: list[str | None]
    amount: NDArray[np.float64] | None
    route: list[str | None] | None
    duration: NDArray[np.float64] | None
    rate: NDArray[np.float64] | None
    factor: float  # multiply a time in the file's unit by this to get axis units
    clock: bool
    origins: dict[str, str] = field(default_factory=dict)  # clock origin per subject (ISO text)
    blq_dropped: NDArray[np.bool_] | None = None
    time_unit: str = "h"  # the axis unit of ``time``

    @property
    def n(self) -> int:
        return len(self.rows)


def parse_records(
    table: RawTable,
    cols: ColumnRoles,
    *,
    source_time_unit: str,
    time_axis: str,
    blq: str,
    observables: Sequence[str] | None,
    notes: list[ReadNote],
) -> Records:
    """Parse and check every role column of ``table``.

    Raises
    ------
    DataError
        Missing subject or time, a time or value that is not a number, not finite or
        negative, a censored word with no LLOQ known, an observable not in
        ``observables``, an unknown route.
    """
    path = table.path
    rows = np.asarray(table.rows, dtype=np.int64)
    n = len(rows)

    def col(role: str) -> list[str] | None:
        j = cols.roles.get(role)
        return None if j is None else table.columns[j]

    # subject
    subj_cells = col("subject")
    if subj_cells is None:
        subject = ["1"] * n
        notes.append(ReadNote(None, None, "supplied", "the file has no subject column; every row is read as subject '1'"))
    else:
        name = cols.column("subject")
        bad = [i for i, s in enumerate(subj_cells) if V.is_missing(s)]
        if bad:
            fail_rows("the subject is missing", "give every row a subject id", path, rows[bad].tolist(), name)
        subject = list(subj_cells)

    time, clock, origins = _parse_times(col("time") or [], subject, rows, cols.column("time"), path,
                                        time_factor(source_time_unit, time_axis), time_axis)
    # a time given as a number (dose_time=, duration=, a duration or rate column) is in
    # the file's time unit, or in hours when the file has date-times
    factor = time_factor("h" if clock else source_time_unit, time_axis)

    # value
    vname = cols.column("value")
    kinds = np.empty(n, dtype=np.int8)
    value = np.full(n, np.nan)
    for i, text in enumerate(col("value") or []):
        kinds[i], value[i] = V.parse_measurement(text)
    _refuse(kinds == V.BAD, rows, table.columns[cols.roles["value"]], path, vname,
            "is not a number", "write plain numbers, '<0.1' or 'BLQ' for a value below the limit, or leave the cell empty")
    _refuse(kinds == V.NONFINITE, rows, table.columns[cols.roles["value"]], path, vname,
            "is not a finite number", "leave the cell empty for a missing value")
    _refuse((kinds == V.NUMBER) & (value < 0), rows, table.columns[cols.roles["value"]], path, vname,
            "is negative", "measured values must be 0 or more; check the sign or the baseline correction")

    lloq = _numbers(col("lloq"), rows, path, cols.column("lloq"), "an LLOQ", positive=False)
    if lloq is None:
        lloq = np.full(n, np.nan)
    observable = _observables(col("observable"), rows, path, cols.column("observable"), observables)
    amount = _numbers(col("dose"), rows, path, cols.column("dose"), "a dose amount", positive=False)
    duration = _numbers(col("duration"), rows, path, cols.column("duration"), "a duration", positive=False)
    rate = _numbers(col("rate"), rows, path, cols.column("rate"), "a rate", positive=False)
    if duration is not None:
        duration = _zero_is_missing(duration) * factor
    if rate is not None:
        rate = _zero_is_missing(rate) / factor
    route = _routes(col("route"), rows, path, cols.column("route"))

    is_obs = np.isin(kinds, (V.NUMBER, V.BELOW_WORD, V.BELOW_LIMIT))
    censored = np.zeros(n, dtype=bool)
    dropped = _resolve_blq(kinds, value, lloq, censored, is_obs, rows, col("value") or [], path, vname, blq, notes)
    return Records(rows, subject, time, is_obs, value, censored, lloq, observable, amount, route,
                   duration, rate, factor, clock, origins, dropped, time_axis)


def _refuse(mask: NDArray[np.bool_], rows: NDArray[np.int64], cells: list[str], path: str | None,
            column: str | None, what: str, todo: str) -> None:
    idx = np.flatnonzero(mask)
    if idx.size:
        fail_rows(f"'{cells[idx[0]]}' {what}", todo, path, rows[idx].tolist(), column)


def _numbers(cells: list[str] | None, rows: NDArray[np.int64], path: str | None, column: str | None,
             what: str, positive: bool) -> NDArray[np.float64] | None:
    """Parse an optional numeric column; missing cells are nan."""
    if cells is None:
        return None
    kinds = np.empty(len(cells), dtype=np.int8)
    out = np.full(len(cells), np.nan)
    for i, text in enumerate(cells):
        kinds[i], out[i] = V.parse_number(text)
    _refuse(kinds == V.BAD, rows, cells, path, column, "is not a number", f"write {what} as a plain number, or leave the cell empty")
    _refuse(kinds == V.NONFINITE, rows, cells, path, column, "is not a finite number", "leave the cell empty for a missing value")
    _refuse((kinds == V.NUMBER) & (out < 0), rows, cells, path, column, "is negative", f"{what} must be 0 or more")
    return out


def _zero_is_missing(x: NDArray[np.float64]) -> NDArray[np.float64]:
    return np.where(x == 0, np.nan, x)


def _routes(cells: list[str] | None, rows: NDArray[np.int64], path: str | None, column: str | None) -> list[str | None] | None:
    if cells is None:
        return None
    out: list[str | None] = []
    bad: list[int] = []
    for i, text in enumerate(cells):
        if V.is_missing(text):
            out.append(None)
            continue
        r = V.parse_route(text)
        if r is None:
            bad.append(i)
        out.append(r)
    if bad:
        fail_rows(f"'{cells[bad[0]]}' is not a route I know", "write iv (or bolus, intravenous), oral (or po, by mouth) "
                  "or infusion (or inf)", path, rows[bad].tolist(), column)
    return out


def _observables(cells: list[str] | None, rows: NDArray[np.int64], path: str | None, column: str | None,
                 allowed: Sequence[str] | None) -> list[str | None]:
    if cells is None:
        return [None] * len(rows)
    out = [None if V.is_missing(c) else c for c in cells]
    if allowed is not None:
        bad = [i for i, o in enumerate(out) if o is not None and o not in allowed]
        if bad:
            fail_rows(f"observable '{out[bad[0]]}' is not one of {', '.join(repr(a) for a in allowed)}",
                      "correct the name, or add it to observables=", path, rows[bad].tolist(), column)
    return out


def _parse_times(cells: list[str], subject: list[str], rows: NDArray[np.int64], column: str | None,
                 path: str | None, factor: float, axis: str
                 ) -> tuple[NDArray[np.float64], bool, dict[str, str]]:
    n = len(cells)
    kinds = np.empty(n, dtype=np.int8)
    t = np.full(n, np.nan)
    for i, text in enumerate(cells):
        kinds[i], t[i] = V.parse_number(text)
    empty = np.flatnonzero(kinds == V.EMPTY)
    if empty.size:
        fail_rows("the time is missing", "every row needs a time", path, rows[empty].tolist(), column)
    bad = kinds == V.BAD
    if bad.any():
        clocks = [V.parse_clock(c) for c in cells]
        if all(c is not None for c in clocks):
            return _clock_times(clocks, subject, rows, column, path, axis)
        if all(clocks[i] is not None for i in np.flatnonzero(bad)):
            numeric = np.flatnonzero(kinds == V.NUMBER)
            fail_rows(f"'{cells[numeric[0]]}' is a number but other rows have date-times",
                      "write every time the same way: all numbers or all ISO date-times",
                      path, rows[numeric].tolist(), column)
        _refuse(bad, rows, cells, path, column, "is not a number",
                "write times as numbers, or every time as an ISO date-time such as 2024-03-01 08:30")
    _refuse(kinds == V.NONFINITE, rows, cells, path, column, "is not a finite number", "every row needs a time")
    _refuse(t < 0, rows, cells, path, column, "is negative",
            "times must be 0 or more, counted from the first dose (or the subject's first record)")
    if factor != 1.0:
        t = t * factor
    return t, False, {}


def _clock_times(clocks: list[datetime | None], subject: list[str], rows: NDArray[np.int64], column: str | None,
                 path: str | None, axis: str) -> tuple[NDArray[np.float64], bool, dict[str, str]]:
    """Date-times to axis units since each subject's first record (a dose or a sample).

    The origins are returned as ISO text; :func:`~compartments.study.read_study` notes
    them per subject once it knows whether the first record is a dose.
    """
    aware = [c.tzinfo is not None for c in clocks if c is not None]
    if any(aware) and not all(aware):
        idx = [i for i, c in enumerate(clocks) if c is not None and (c.tzinfo is not None) != aware[0]]
        fail_rows("this date-time has a different time-zone style from the first row's",
                  "write every date-time with a time zone or none without", path, rows[idx].tolist(), column)
    first: dict[str, datetime] = {}
    for s, c in zip(subject, clocks, strict=False):
        if c is not None and (s not in first or c < first[s]):
            first[s] = c
    per_h = time_factor("h", axis)
    t = np.array([(c - first[s]).total_seconds() / 3600.0 * per_h for s, c in zip(subject, clocks, strict=False) if c is not None])
    origins = {s: first[s].isoformat(sep=" ") for s in first}
    return t, True, origins


def _resolve_blq(kinds: NDArray[np.int8], value: NDArray[np.float64], lloq: NDArray[np.float64],
                 censored: NDArray[np.bool_], is_obs: NDArray[np.bool_], rows: NDArray[np.int64],
                 cells: list[str], path: str | None, column: str | None, blq: str,
                 notes: list[ReadNote]) -> NDArray[np.bool_]:
    """Mark censored rows, apply the ``blq`` mode in place; return the rows dropped."""
    limit = kinds == V.BELOW_LIMIT
    clash = limit & np.isfinite(lloq) & (lloq != value)
    for i in np.flatnonzero(clash):
        notes.append(ReadNote(int(rows[i]), column, "flagged",
                              f"'{cells[i]}' gives the limit {value[i]:g} but the lloq column says {lloq[i]:g}; used {value[i]:g}"))
    lloq[limit] = value[limit]
    word = kinds == V.BELOW_WORD
    unknown = word & ~np.isfinite(lloq)
    if blq != "drop" and unknown.any():
        idx = np.flatnonzero(unknown)
        fail_rows(f"'{cells[idx[0]]}' is below the limit of quantification, but no limit is known",
                  "add an lloq column with the limit, or write the value as '<0.1' with the limit",
                  path, rows[idx].tolist(), column)
    below = (kinds == V.NUMBER) & np.isfinite(lloq) & (value < lloq)
    is_blq = limit | word | below
    dropped = np.zeros(len(kinds), dtype=bool)
    for i in np.flatnonzero(is_blq):
        if below[i]:
            head = f"{cells[i]} is below the LLOQ {lloq[i]:g}"
        else:
            known = f" ({lloq[i]:g})" if np.isfinite(lloq[i]) else ""
            head = f"'{cells[i]}' is below the limit of quantification{known}"
        if blq == "drop":
            dropped[i] = True
            is_obs[i] = False
            notes.append(ReadNote(int(rows[i]), column, "dropped", f"{head}; dropped (blq='drop')"))
        elif blq == "half":
            value[i] = lloq[i] / 2.0
            notes.append(ReadNote(int(rows[i]), column, "changed", f"{head}; replaced by half the LLOQ, {value[i]:g} (blq='half')"))
        else:
            value[i] = lloq[i]
            censored[i] = True
            notes.append(ReadNote(int(rows[i]), column, "changed", f"{head}; kept as censored at the LLOQ"))
    return dropped


__all__ = ["BLQ_MODES", "Records", "parse_records", "rows_text"]
