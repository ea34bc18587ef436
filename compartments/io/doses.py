"""Dose layouts: where the doses of each subject come from.

``"rows"``
    Dose event rows: a row with a dose amount is a dose at its time; a row with both an
    amount and a value is both a dose and an observation. Many doses at irregular
    times (the Phenobarb layout).
``"per-subject"``
    A dose column repeated on every row of a subject, constant within the subject: one
    dose per subject at ``dose_time`` (the Theoph layout).
``"supplied"``
    No dose in the file: ``dose=`` and ``route=`` given by the user for every subject at
    ``dose_time`` (the Indometh layout); recorded as a supplied note.
``"none"``
    No dose column and no ``dose=``: subjects have no doses (growth curves, baselines).

With ``dose_layout="auto"`` a dose column that is filled on every row and constant
within every subject is read per subject; one with empty cells is read as dose rows;
one filled everywhere but changing within a subject is ambiguous and refused.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..dosing import AUTO, Dose
from ..errors import DataError, UsageError
from .columns import ColumnRoles
from .notes import ReadNote
from .records import Records
from .rowlist import fail_rows, rows_text

LAYOUTS = ("auto", "rows", "per-subject")
_AUTO_NOTE = ("the file does not say how the doses were given: each enters the model's only dose input "
              "(oral for an oral template, iv for an intravenous one); give route= (command line: --route) "
              "or a route column to be explicit")
_ROUTE_FIX = "pass route='iv', 'oral' or 'infusion' (command line: --route) or add a route column"


@dataclass
class DosePlan:
    """The doses read or supplied, per subject.

    Attributes
    ----------
    layout : {"rows", "per-subject", "supplied", "none"}
    doses : dict
        Subject id -> list of :class:`~compartments.dosing.Dose` sorted by time.
    dose_rows : ndarray of bool
        Rows read as dose events (layout ``"rows"`` only).
    """

    layout: str
    doses: dict[str, list[Dose]]
    dose_rows: NDArray[np.bool_]


def build_doses(
    rec: Records,
    cols: ColumnRoles,
    *,
    path: str | None,
    layout: str,
    dose: float | None,
    dose_time: float,
    route: str | None,
    duration: float | None,
    notes: list[ReadNote],
) -> DosePlan:
    """Decide the dose layout and build every subject's doses.

    Parameters
    ----------
    dose_time, duration : float, file time unit
        Converted to the time axis with ``rec.factor``.

    Raises
    ------
    DataError
        Dose without amount, no route known, unknown route, infusion with neither rate
        nor duration, two doses of one subject at one time, a per-subject dose that
        changes within a subject, an ambiguous dose column.
    UsageError
        ``dose=`` together with a dose column, ``dose=`` without ``route=``.
    """
    subjects = list(dict.fromkeys(rec.subject))
    no_rows = np.zeros(rec.n, dtype=bool)
    column = cols.column("dose")
    if dose is not None:
        if column is not None:
            raise UsageError(
                f"the file has a dose column '{column}' and dose={dose} was given; drop dose= "
                "or map the dose column away"
            )
        _refuse_dose_info_without_amount(rec, cols, path, no_rows)
        return _supplied(rec, subjects, dose, dose_time, route, duration, notes)
    if column is None:
        _refuse_dose_info_without_amount(rec, cols, path, no_rows)
        notes.append(ReadNote(None, None, "flagged", "the file has no dose column and no dose= was given; subjects have no doses"))
        return DosePlan("none", {s: [] for s in subjects}, no_rows)
    amount = rec.amount if rec.amount is not None else np.full(rec.n, np.nan)
    if layout == "auto":
        layout = _detect(rec, amount, column, path, notes)
    if layout == "per-subject":
        return _per_subject(rec, subjects, amount, column, cols.column("route"), path, dose_time, route, duration, notes)
    return _rows(rec, cols, subjects, amount, column, path, route, duration, notes)


def _detect(rec: Records, amount: NDArray[np.float64], column: str, path: str | None, notes: list[ReadNote]) -> str:
    if np.isnan(amount).any():
        n = int((~np.isnan(amount)).sum())
        notes.append(ReadNote(None, column, "kept", f"dose column read as dose rows: each of the {n} rows with an amount is a dose at its time"))
        return "rows"
    subject = np.asarray(rec.subject, dtype=object)
    for s in dict.fromkeys(rec.subject):
        idx = np.flatnonzero(subject == s)
        changed = idx[amount[idx] != amount[idx[0]]]
        if changed.size:
            raise DataError(
                f"the dose column is filled on every row but changes within subject {s} "
                f"({rows_text(rec.rows[changed].tolist())}); say dose_layout='rows' if every row is a dose, "
                "or dose_layout='per-subject' with one dose per subject",
                path, int(rec.rows[changed[0]]), column,
            )
    notes.append(ReadNote(None, column, "kept", "dose column read as one dose per subject (it is filled on every row "
                          "and constant within every subject)"))
    return "per-subject"


def _refuse_dose_info_without_amount(rec: Records, cols: ColumnRoles, path: str | None, dose_rows: NDArray[np.bool_]) -> None:
    """A row with no value and no amount but a route, duration or rate is a dose without amount."""
    info = np.zeros(rec.n, dtype=bool)
    names = []
    if rec.route is not None:
        info |= np.array([r is not None for r in rec.route])
        names.append(cols.column("route"))
    for role, arr in (("duration", rec.duration), ("rate", rec.rate)):
        if arr is not None:
            info |= np.isfinite(arr)
            names.append(cols.column(role))
    amount = rec.amount if rec.amount is not None else np.full(rec.n, np.nan)
    bad = np.flatnonzero(info & ~rec.is_obs & ~dose_rows & np.isnan(amount) & ~_blq_dropped(rec))
    if bad.size:
        column = cols.column("dose")
        fail_rows("this row describes a dose (route, duration or rate) but has no dose amount",
                  "fill in the amount" + (f" in column '{column}'" if column else " in a dose column")
                  + ", or clear the row", path, rec.rows[bad].tolist(), column or names[0])


def _blq_dropped(rec: Records) -> NDArray[np.bool_]:
    return rec.blq_dropped if rec.blq_dropped is not None else np.zeros(rec.n, dtype=bool)


def _supplied(rec: Records, subjects: list[str], dose: float, dose_time: float, route: str | None,
              duration: float | None, notes: list[ReadNote]) -> DosePlan:
    if route is None:
        route = AUTO
        notes.append(ReadNote(None, None, "supplied", _AUTO_NOTE))
    if route == "infusion" and duration is None:
        raise UsageError("an infusion given with dose= needs duration= (in the file's time unit)")
    t = dose_time * rec.factor
    dur = duration * rec.factor if (duration is not None and route == "infusion") else None
    one = Dose(t, float(dose), route, duration=dur)
    notes.append(ReadNote(None, None, "supplied", f"the file has no doses; every subject given {dose:g} ({route}) "
                          f"at time {dose_time:g}" + (f" over {duration:g}" if dur is not None else "") + " from dose=, route="))
    return DosePlan("supplied", {s: [one] for s in subjects}, np.zeros(rec.n, dtype=bool))


def _per_subject(rec: Records, subjects: list[str], amount: NDArray[np.float64], column: str,
                 cols_route: str | None, path: str | None,
                 dose_time: float, route: str | None, duration: float | None, notes: list[ReadNote]) -> DosePlan:
    subject = np.asarray(rec.subject, dtype=object)
    doses: dict[str, list[Dose]] = {}
    for s in subjects:
        idx = np.flatnonzero(subject == s)
        have = idx[~np.isnan(amount[idx])]
        if have.size == 0:
            notes.append(ReadNote(None, column, "flagged", f"subject {s} has no dose amount; no dose"))
            doses[s] = []
            continue
        changed = have[amount[have] != amount[have[0]]]
        if changed.size:
            fail_rows(f"the per-subject dose changes within subject {s} ({amount[changed[0]]:g} here, "
                      f"{amount[have[0]]:g} on row {rec.rows[have[0]]})",
                      "a per-subject dose column must be constant; use dose rows (dose_layout='rows') for several doses",
                      path, rec.rows[changed].tolist(), column)
        r = _subject_value(rec.route, idx, rec, path, "route", s, cols_route) if rec.route is not None else None
        r = r or route
        if r is None:
            r = AUTO
            if not any(n.reason == _AUTO_NOTE for n in notes):
                notes.append(ReadNote(None, column, "supplied", _AUTO_NOTE))
        dur = _subject_number(rec.duration, idx)
        rate = _subject_number(rec.rate, idx)
        if dur is None and duration is not None:
            dur = duration * rec.factor
        if r == "infusion" and dur is None and rate is None:
            raise DataError(f"the dose of subject {s} is an infusion with neither a duration nor a rate; "
                            "add a duration or rate column, or pass duration=", path, int(rec.rows[have[0]]), column)
        if r != "infusion":
            dur = rate = None
        doses[s] = [Dose(dose_time * rec.factor, float(amount[have[0]]), r, duration=dur, rate=rate)]
    return DosePlan("per-subject", doses, np.zeros(rec.n, dtype=bool))


def _subject_value(values: list[str | None], idx: NDArray[np.intp], rec: Records, path: str | None,
                   what: str, s: str, column: str | None) -> str | None:
    found = [(values[i], i) for i in idx if values[i] is not None]
    if not found:
        return None
    other = [i for v, i in found if v != found[0][0]]
    if other:
        fail_rows(f"the {what} of subject {s} changes ({values[other[0]]} here, {found[0][0]} on row {rec.rows[found[0][1]]})",
                  f"with one dose per subject the {what} must be constant", path, rec.rows[other].tolist(), column)
    return found[0][0]


def _subject_number(arr: NDArray[np.float64] | None, idx: NDArray[np.intp]) -> float | None:
    if arr is None:
        return None
    vals = arr[idx][np.isfinite(arr[idx])]
    return float(vals[0]) if vals.size else None


def _rows(rec: Records, cols: ColumnRoles, subjects: list[str], amount: NDArray[np.float64], column: str,
          path: str | None, route: str | None, duration: float | None, notes: list[ReadNote]) -> DosePlan:
    present = ~np.isnan(amount)
    zero_obs = present & (amount == 0) & rec.is_obs
    if zero_obs.any():
        notes.append(ReadNote(None, column, "kept", f"{int(zero_obs.sum())} observation rows have a dose amount of 0; "
                              "read as no dose"))
    dose_rows = present & (amount > 0)
    _refuse_dose_info_without_amount(rec, cols, path, dose_rows | (present & (amount == 0)))
    idx = np.flatnonzero(dose_rows)
    routes = [(rec.route[i] if rec.route is not None else None) or route for i in idx]
    if any(r is None for r in routes):
        routes = [r or AUTO for r in routes]
        notes.append(ReadNote(None, cols.column("route") or column, "supplied", _AUTO_NOTE))
    durations = [float(rec.duration[i]) if rec.duration is not None and np.isfinite(rec.duration[i]) else None for i in idx]
    rates = [float(rec.rate[i]) if rec.rate is not None and np.isfinite(rec.rate[i]) else None for i in idx]
    if duration is not None:
        durations = [d if d is not None else duration * rec.factor for d in durations]
    bad = [int(rec.rows[i]) for i, r, d, q in zip(idx, routes, durations, rates, strict=False) if r == "infusion" and d is None and q is None]
    if bad:
        fail_rows("this infusion has neither a duration nor a rate",
                  "add a duration or rate column, or pass duration=", path, bad, cols.column("route") or column)
    seen: dict[tuple[str, float], int] = {}
    dup: list[int] = []
    doses: dict[str, list[Dose]] = {s: [] for s in subjects}
    for i, r, d, q in zip(idx, routes, durations, rates, strict=False):
        key = (rec.subject[i], float(rec.time[i]))
        if key in seen:
            dup.append(int(rec.rows[i]))
            continue
        seen[key] = int(rec.rows[i])
        if r != "infusion":
            d = q = None
        doses[rec.subject[i]].append(Dose(float(rec.time[i]), float(amount[i]), r, duration=d, rate=q))
    if dup:
        first = [seen[(rec.subject[i], float(rec.time[i]))] for i in idx if int(rec.rows[i]) == dup[0]][0]
        fail_rows(f"a second dose for the same subject at the same time as row {first}",
                  "merge the two doses into one row, or correct the time", path, dup, column)
    for s in doses:
        doses[s].sort(key=lambda d: d.time)
    return DosePlan("rows", doses, dose_rows)
