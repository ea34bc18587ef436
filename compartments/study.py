"""Study data: subjects with sparse, irregular samples and doses, read faithfully.

:func:`read_study` reads a study file (CSV, TSV, Excel, Parquet) or a pandas DataFrame
into a :class:`Study` of :class:`Subject` s. It says exactly what it read — every row
dropped or changed and every value supplied is a :class:`ReadNote` — and refuses what it
cannot use with a :class:`~compartments.errors.DataError` naming the file, row and column,
what is wrong and what to do.

The parts of the job live in :mod:`compartments.io`: formats, column roles, units,
censored values, dose layouts, covariates.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from .dosing import ROUTES, Dose
from .errors import DataError, UsageError
from .io.columns import resolve_columns
from .io.covariates import read_covariates
from .io.doses import LAYOUTS, build_doses
from .io.formats import read_table
from .io.notes import ReadNote
from .io.records import BLQ_MODES, Records, parse_records
from .io.rowlist import rows_text
from .io.units import declared_units, require_time_unit, time_factor
from .io.values import parse_route

__all__ = ["ReadNote", "Study", "Subject", "SubjectNotFound", "read_study"]


class SubjectNotFound(UsageError, KeyError):
    """A subject id that is not in the study."""

    def __str__(self) -> str:
        return str(self.args[0]) if self.args else ""


def _frozen(a: Any, dtype: Any) -> NDArray[Any]:
    out = np.array(a, dtype=dtype)  # a copy, so the caller's array stays writable
    out.setflags(write=False)
    return out


class _Picklable:
    """Pickling for the frozen data classes below: read-only mapping views cannot be
    pickled, so they travel as plain dicts (process pools, Dask) and are re-frozen."""

    def __getstate__(self) -> dict[str, Any]:
        return {k: dict(v) if isinstance(v, MappingProxyType) else v for k, v in self.__dict__.items()}

    def __setstate__(self, state: dict[str, Any]) -> None:
        for k, v in state.items():
            object.__setattr__(self, k, v)
        self.__post_init__()  # type: ignore[attr-defined]


@dataclass(frozen=True, eq=False)
class Subject(_Picklable):
    """One subject's observations, doses and covariates.

    Attributes
    ----------
    id : str
    times : ndarray of float, time-axis unit (h unless the study says otherwise)
        Since the first dose or the subject's origin; sorted, stably.
    values : ndarray of float
        Observed values; for censored rows, the LLOQ.
    observables : tuple of (str or None)
        Observable name per row; None means the template's single observable.
    censored : ndarray of bool
        True where the value is below the LLOQ (``values`` then holds the LLOQ).
    lloq : ndarray of float
        LLOQ per row, nan where unknown.
    rows : ndarray of int
        1-based row numbers in the source file (header = row 1).
    doses : tuple of Dose
        Sorted by time.
    covariates : Mapping
        Per-subject columns (weight, score, ...).
    flags : tuple of str
        Plain sentences about this subject's data (pre-dose samples, replicates).

    Examples
    --------
    >>> s = Subject("1", np.array([0.5, 1.0]), np.array([2.0, 1.5]), (None, None),
    ...             np.array([False, False]), np.array([np.nan, np.nan]), np.array([2, 3]),
    ...             (Dose(0.0, 100.0, "iv"),), {}, ())
    >>> s.n_obs, s.observed().tolist()
    (2, [True, True])
    """

    id: str
    times: NDArray[np.float64]
    values: NDArray[np.float64]
    observables: tuple[str | None, ...]
    censored: NDArray[np.bool_]
    lloq: NDArray[np.float64]
    rows: NDArray[np.int64]
    doses: tuple[Dose, ...] = ()
    covariates: Mapping[str, object] = field(default_factory=dict)
    flags: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        set_ = object.__setattr__
        set_(self, "id", str(self.id))
        set_(self, "times", _frozen(self.times, np.float64))
        set_(self, "values", _frozen(self.values, np.float64))
        set_(self, "censored", _frozen(self.censored, np.bool_))
        set_(self, "lloq", _frozen(self.lloq, np.float64))
        set_(self, "rows", _frozen(self.rows, np.int64))
        set_(self, "observables", tuple(self.observables))
        set_(self, "doses", tuple(sorted(self.doses, key=lambda d: d.time)))
        set_(self, "covariates", MappingProxyType(dict(self.covariates)))
        set_(self, "flags", tuple(self.flags))
        n = len(self.times)
        sizes = {len(x) for x in (self.values, self.observables, self.censored, self.lloq, self.rows)}
        if sizes != {n}:
            raise UsageError(f"subject {self.id}: times, values, observables, censored, lloq and rows must have one entry per observation")

    @property
    def n_obs(self) -> int:
        """Number of observations (censored ones included)."""
        return len(self.times)

    @property
    def n_censored(self) -> int:
        return int(self.censored.sum())

    def observed(self, observable: str | None = None) -> NDArray[np.bool_]:
        """Mask of the rows that measure ``observable``.

        With None, every row (the template's single observable). With a name, the rows
        with that name and the rows with no name.
        """
        if observable is None:
            return np.ones(self.n_obs, dtype=bool)
        return np.array([o is None or o == observable for o in self.observables], dtype=bool)

    def with_(self, **changes: Any) -> Subject:
        """A copy with some fields replaced (``dataclasses.replace``)."""
        return replace(self, **changes)

    def in_time_unit(self, factor: float) -> Subject:
        """A copy with times, dose times, durations, intervals and rates scaled to another unit."""
        doses = tuple(d.in_time_unit(factor) for d in self.doses)
        return self.with_(times=self.times * factor, doses=doses)


@dataclass(frozen=True, eq=False)
class Study(_Picklable):
    """Subjects read from one source, with the record of how they were read.

    Attributes
    ----------
    subjects : tuple of Subject
        In order of first appearance in the source.
    source : str or None
        The file path, or ``"<DataFrame>"``.
    sha256 : str or None
        Of the file bytes.
    units : Mapping
        ``{"time": "h", "value": "mg/L", "dose": "mg/kg", ...}`` as declared or found in
        the header (``""`` when unknown); covariates by name. ``"time"`` is the file's
        time unit; :attr:`time_unit` is the unit of the stored times.
    time_unit : str
        Unit of :attr:`Subject.times` (``"h"`` unless read with another ``time_axis``).
    dose_per_weight : bool
        Doses per kg of body weight (e.g. mg/kg): volumes come out per kg.
    notes : tuple of ReadNote
        Every row dropped or changed and every value supplied, with the reason.
    skipped : tuple of str
        Subjects with no usable observation, with the reason.
    settings : Mapping
        The options read with, and the column roles and dose layout chosen.
    """

    subjects: tuple[Subject, ...]
    source: str | None = None
    sha256: str | None = None
    units: Mapping[str, str] = field(default_factory=dict)
    time_unit: str = "h"
    dose_per_weight: bool = False
    notes: tuple[ReadNote, ...] = ()
    skipped: tuple[str, ...] = ()
    settings: Mapping[str, object] = field(default_factory=dict)

    def __post_init__(self) -> None:
        set_ = object.__setattr__
        set_(self, "subjects", tuple(self.subjects))
        set_(self, "units", MappingProxyType(dict(self.units)))
        set_(self, "notes", tuple(self.notes))
        set_(self, "skipped", tuple(self.skipped))
        set_(self, "settings", MappingProxyType(dict(self.settings)))
        ids = [s.id for s in self.subjects]
        if len(set(ids)) != len(ids):
            raise UsageError("a study cannot hold two subjects with the same id")

    @property
    def ids(self) -> tuple[str, ...]:
        return tuple(s.id for s in self.subjects)

    def __len__(self) -> int:
        return len(self.subjects)

    def __iter__(self) -> Iterator[Subject]:
        return iter(self.subjects)

    def __getitem__(self, key: str | int) -> Subject:
        """The subject whose id is ``str(key)``."""
        wanted = str(key)
        for s in self.subjects:
            if s.id == wanted:
                return s
        shown = ", ".join(self.ids[:10]) + (" ..." if len(self) > 10 else "")
        raise SubjectNotFound(f"no subject '{wanted}' in the study; subjects are {shown}")

    def subset(self, ids: Iterable[str | int]) -> Study:
        """A study with only the given subjects (in the study's order)."""
        wanted = [str(i) for i in ids]
        for w in wanted:
            self[w]  # raises SubjectNotFound
        keep = tuple(s for s in self.subjects if s.id in set(wanted))
        return replace(self, subjects=keep)

    def in_time_unit(self, unit: str) -> Study:
        """The same study with times in ``unit`` (``"h"``, ``"min"``, ``"s"``, ``"day"``, ``"week"``).

        Examples
        --------
        >>> s = Study((Subject("1", [24.0], [1.0], (None,), [False], [np.nan], [2]),))
        >>> s.in_time_unit("day")["1"].times.tolist()
        [1.0]
        """
        unit = require_time_unit(unit, "unit")
        if unit == self.time_unit:
            return self
        factor = time_factor(self.time_unit, unit)
        return replace(self, subjects=tuple(s.in_time_unit(factor) for s in self.subjects), time_unit=unit)

    def summary(self) -> pd.DataFrame:
        """One row per subject: counts, first and last time, covariates."""
        records = []
        for s in self.subjects:
            rec: dict[str, object] = {
                "subject": s.id,
                "n_obs": s.n_obs,
                "n_doses": len(s.doses),
                "n_censored": s.n_censored,
                "first_time": float(s.times.min()) if s.n_obs else np.nan,
                "last_time": float(s.times.max()) if s.n_obs else np.nan,
            }
            rec.update(s.covariates)
            records.append(rec)
        cols = ["subject", "n_obs", "n_doses", "n_censored", "first_time", "last_time"]
        return pd.DataFrame.from_records(records, columns=cols + self.covariate_names)

    @property
    def covariate_names(self) -> list[str]:
        return list(dict.fromkeys(k for s in self.subjects for k in s.covariates))

    def summary_totals(self) -> dict[str, object]:
        """Study-wide totals for reports.

        Keys: subjects, observations, obs_per_subject (min, median, max), doses, censored,
        time_span (first, last), time_unit, covariates, units, notes, skipped,
        dose_per_weight, source, sha256.
        """
        counts = np.array([s.n_obs for s in self.subjects], dtype=float)
        times = [s.times for s in self.subjects if s.n_obs]
        span = (float(min(t.min() for t in times)), float(max(t.max() for t in times))) if times else (np.nan, np.nan)
        return {
            "subjects": len(self),
            "observations": int(counts.sum()),
            "obs_per_subject": (int(counts.min()), float(np.median(counts)), int(counts.max())) if len(self) else (0, 0.0, 0),
            "doses": sum(len(s.doses) for s in self.subjects),
            "censored": sum(s.n_censored for s in self.subjects),
            "time_span": span,
            "time_unit": self.time_unit,
            "covariates": self.covariate_names,
            "units": dict(self.units),
            "notes": len(self.notes),
            "skipped": len(self.skipped),
            "dose_per_weight": self.dose_per_weight,
            "source": self.source,
            "sha256": self.sha256,
        }


def read_study(
    source: str | Path | pd.DataFrame,
    *,
    columns: Mapping[str, str] | str | Path | None = None,
    dose_column: str | None = None,
    dose_time: float = 0.0,
    dose: float | None = None,
    route: str | None = None,
    duration: float | None = None,
    time_unit: str | None = None,
    units: Mapping[str, str] | None = None,
    blq: str = "censor",
    sheet: str | int | None = None,
    observables: Sequence[str] | None = None,
    time_axis: str = "h",
    dose_layout: str = "auto",
) -> Study:
    """Read a study file or DataFrame into a :class:`Study`.

    Parameters
    ----------
    source : str, Path or pandas.DataFrame
        ``.csv``, ``.tsv``/``.tab``/``.txt`` (comma, semicolon or tab, sniffed),
        ``.xlsx``/``.xls``, ``.parquet`` or a DataFrame.
    columns : mapping or path, optional
        Role -> column name (roles: subject, time, value, observable, dose, route,
        duration, rate, lloq), or a TOML file of ``role = "Column"`` lines. Roles not
        mapped are matched by plain words (see :mod:`compartments.io.columns`).
    dose_column : str, optional
        A per-subject dose column (one dose per subject at ``dose_time``).
    dose_time : float, file time unit
        Time of the per-subject or supplied dose.
    dose : float, optional
        Dose given to every subject at ``dose_time`` when the file has none; needs ``route``.
    route : {"iv", "oral", "infusion"}, optional
        Route of doses that the file does not give a route for (synonyms such as
        ``"po"`` or ``"bolus"`` are accepted).
    duration : float, file time unit, optional
        Infusion duration where the file gives neither duration nor rate.
    time_unit : str, optional
        Unit of the file's times (h, min, s, day, week); default the time column's header
        unit, else hours (with a note).
    units : mapping, optional
        Units of roles and covariates, e.g. ``{"value": "mg/L", "dose": "mg/kg"}``; must
        agree with units written in the header.
    blq : {"censor", "drop", "half"}
        Values below the LLOQ: kept as censored, dropped, or replaced by LLOQ/2.
    sheet : str or int, optional
        Workbook sheet; default the first.
    observables : sequence of str, optional
        Allowed names in the observable column.
    time_axis : str
        Unit of the stored times (default ``"h"``); a biology template in days reads with
        ``time_axis="day"``.
    dose_layout : {"auto", "rows", "per-subject"}
        How to read a dose column (see :mod:`compartments.io.doses`).

    Returns
    -------
    Study

    Raises
    ------
    DataError
        The file cannot be used as it stands (the message says where and what to do).
    UsageError
        An option is invalid.

    Examples
    --------
    >>> frame = pd.DataFrame({"id": [1, 1, 1], "time": [0.5, 1, 2], "conc": [4.1, 3.0, "<0.5"]})
    >>> study = read_study(frame, dose=100, route="iv")
    >>> study["1"].censored.tolist(), study["1"].doses[0].amount
    ([False, False, True], 100.0)
    """
    settings = {
        "columns": dict(columns) if isinstance(columns, Mapping) else (str(columns) if columns is not None else None),
        "dose_column": dose_column, "dose_time": dose_time, "dose": dose, "route": route, "duration": duration,
        "time_unit": time_unit, "units": dict(units or {}), "blq": blq, "sheet": sheet,
        "observables": list(observables) if observables is not None else None, "time_axis": time_axis,
        "dose_layout": dose_layout,
    }
    if dose_column is not None and dose_layout == "rows":
        raise UsageError("dose_column= reads one dose per subject; it cannot be combined with dose_layout='rows'")
    route, time_axis = _check_options(blq, route, dose, dose_time, duration, time_unit, time_axis, dose_layout, observables)
    table = read_table(source, sheet)
    path = table.path
    notes: list[ReadNote] = list(table.notes)
    cols = resolve_columns(table.header, columns, dose_column, path, table.header_row)
    unit_map, source_unit, assumed = declared_units(
        cols.names, cols.header_units, cols.roles, cols.header, units, time_unit, path, table.header_row
    )
    rec = parse_records(table, cols, source_time_unit=source_unit, time_axis=time_axis, blq=blq,
                        observables=observables, notes=notes)
    if rec.clock and time_unit is not None:
        notes.append(ReadNote(None, cols.column("time"), "flagged",
                              f"time_unit={time_unit!r} not used: the file's times are date-times"))
    if not rec.clock:
        if assumed:
            notes.append(ReadNote(None, cols.column("time"), "supplied",
                                  "the time unit is not stated; hours assumed (give time_unit= or write it in the header, e.g. 'time (h)')"))
        if source_unit != time_axis:
            notes.append(ReadNote(None, cols.column("time"), "changed", f"times converted from {source_unit} to {time_axis}"))
    layout = "per-subject" if dose_column is not None else dose_layout
    plan = build_doses(rec, cols, path=path, layout=layout, dose=dose, dose_time=dose_time, route=route,
                       duration=duration, notes=notes)
    if rec.clock:
        _note_origins(rec, plan.doses, cols.column("time"), notes)
    covariates, _ = read_covariates(table, cols, rec.subject, notes)
    _note_unused_rows(rec, plan.dose_rows, plan.layout, cols.column("value"), notes)
    subjects, skipped = _assemble(rec, plan.doses, covariates, blq, cols.column("value"), notes)
    if not subjects:
        raise DataError(
            f"no subject has a usable observation ({'; '.join(skipped[:3])}); check the value column "
            f"'{cols.column('value')}' and the blq= option",
            path,
        )
    if all(s.censored.all() for s in subjects):
        n_cens = sum(s.n_censored for s in subjects)
        raise DataError(
            f"every one of the {n_cens} observations in column '{cols.column('value')}' is below the limit of "
            "quantification, so nothing can be estimated; check the value and lloq columns (a wrong unit or "
            "limit?) and that the right column is read as the value",
            path,
        )
    settings.update({
        "column_roles": {r: cols.header[j] for r, j in cols.roles.items()},
        "dose_layout_used": plan.layout,
        "source_time_unit": "clock" if rec.clock else source_unit,
        "format": table.format,
    })
    dose_unit = unit_map.get("dose", "")
    return Study(
        subjects=tuple(subjects),
        source=path,
        sha256=table.sha256,
        units=unit_map,
        time_unit=time_axis,
        dose_per_weight=re.search(r"/\s*kg\s*$", dose_unit, re.IGNORECASE) is not None,
        notes=tuple(notes),
        skipped=tuple(skipped),
        settings=settings,
    )


def _check_options(blq: str, route: str | None, dose: float | None, dose_time: float, duration: float | None,
                   time_unit: str | None, time_axis: str, dose_layout: str,
                   observables: Sequence[str] | None) -> tuple[str | None, str]:
    if blq not in BLQ_MODES:
        raise UsageError(f"blq={blq!r} is not an option; use one of {', '.join(BLQ_MODES)}")
    if dose_layout not in LAYOUTS:
        raise UsageError(f"dose_layout={dose_layout!r} is not an option; use one of {', '.join(LAYOUTS)}")
    if route is not None:
        canonical = parse_route(route)
        if canonical is None:
            raise UsageError(f"route={route!r} is not a route; use one of {', '.join(ROUTES)}")
        route = canonical
    for name, x, positive in (("dose", dose, True), ("duration", duration, True), ("dose_time", dose_time, False)):
        if x is None:
            continue
        if not isinstance(x, (int, float)) or isinstance(x, bool) or not np.isfinite(x) or x < 0 or (positive and x == 0):
            need = "a positive number" if positive else "a number of 0 or more"
            raise UsageError(f"{name}={x!r} must be {need}")
    if time_unit is not None:
        require_time_unit(time_unit, "time_unit")
    axis = require_time_unit(time_axis, "time_axis")
    if observables is not None and (isinstance(observables, str) or not all(isinstance(o, str) for o in observables)):
        raise UsageError("observables= must be a list of names, e.g. ['plasma', 'urine']")
    return route, axis


def _note_origins(rec: Records, doses: dict[str, list[Dose]], column: str | None, notes: list[ReadNote]) -> None:
    """One note per subject: the date-time its times are counted from."""
    for s, origin in rec.origins.items():
        first = doses.get(s, [])
        what = "its first dose" if first and first[0].time == 0.0 else "its first record"
        if first and first[0].time > 0.0:
            what += " (a sample before the first dose)"
        notes.append(ReadNote(None, column, "changed",
                              f"subject {s}: date-times converted to {rec.time_unit} since {what}, {origin}"))


def _note_unused_rows(rec: Records, dose_rows: NDArray[np.bool_], layout: str, value_column: str | None,
                      notes: list[ReadNote]) -> None:
    """Rows with neither an observation nor a dose are dropped, with a note each."""
    dropped_blq = rec.blq_dropped if rec.blq_dropped is not None else np.zeros(rec.n, dtype=bool)
    for i in np.flatnonzero(~rec.is_obs & ~dose_rows & ~dropped_blq):
        if rec.amount is not None and rec.amount[i] == 0:
            why = "dose amount 0 and no value"
        elif layout == "rows":
            why = "no value and no dose amount"
        else:
            why = "no value"
        notes.append(ReadNote(int(rec.rows[i]), value_column, "dropped", f"{why}; row not used"))


def _assemble(rec: Records, doses: dict[str, list[Dose]], covariates: dict[str, dict[str, object]], blq: str,
              value_column: str | None, notes: list[ReadNote]) -> tuple[list[Subject], list[str]]:
    subject = np.asarray(rec.subject, dtype=object)
    ids = list(dict.fromkeys(rec.subject))
    out: list[Subject] = []
    skipped: list[str] = []
    moved: list[str] = []
    dropped_blq = rec.blq_dropped if rec.blq_dropped is not None else np.zeros(rec.n, dtype=bool)
    last = -1
    for s in ids:
        mine = subject == s
        block = np.flatnonzero(mine)
        if block[0] < last or block[-1] - block[0] + 1 != block.size:
            moved.append(s)
        last = int(block[-1])
        idx = np.flatnonzero(mine & rec.is_obs)
        if idx.size == 0:
            n_blq = int((mine & dropped_blq).sum())
            n_doses = len(doses.get(s, []))
            if n_blq:
                skipped.append(f"subject {s}: all {n_blq} observations were below the LLOQ and dropped (blq='{blq}')")
            else:
                skipped.append(f"subject {s}: no observations ({n_doses} doses)")
            continue
        order = idx[np.argsort(rec.time[idx], kind="stable")]
        if not np.array_equal(order, idx) and s not in moved:
            moved.append(s)
        sub = Subject(
            id=s,
            times=rec.time[order],
            values=rec.value[order],
            observables=tuple(rec.observable[i] for i in order),
            censored=rec.censored[order],
            lloq=rec.lloq[order],
            rows=rec.rows[order],
            doses=tuple(doses.get(s, [])),
            covariates=covariates.get(s, {}),
        )
        out.append(sub.with_(flags=_flags(sub, value_column, notes)))
    if moved:
        notes.append(ReadNote(None, None, "changed",
                              f"rows were not in order of subject then time (subjects {', '.join(moved[:10])}"
                              f"{' ...' if len(moved) > 10 else ''}); sorted by subject (in order of first appearance) "
                              "then time, keeping the file order of equal times"))
    return out, skipped


def _flags(s: Subject, value_column: str | None, notes: list[ReadNote]) -> tuple[str, ...]:
    """Pre-dose samples with a nonzero value, and replicate samples."""
    flags: list[str] = []
    if s.doses:
        first = s.doses[0].time
        for i in np.flatnonzero((s.times <= first) & (s.values > 0) & ~s.censored):
            text = f"row {s.rows[i]}: pre-dose sample with nonzero value {s.values[i]:g} kept"
            flags.append(text)
            notes.append(ReadNote(int(s.rows[i]), value_column, "kept",
                                  f"pre-dose sample (time {s.times[i]:g}, at or before the first dose) with nonzero value {s.values[i]:g}"))
    groups: dict[tuple[float, str | None], list[int]] = {}
    for i, (t, o) in enumerate(zip(s.times.tolist(), s.observables, strict=False)):
        groups.setdefault((t, o), []).append(i)
    for (t, _), members in groups.items():
        if len(members) > 1:
            flags.append(f"{rows_text([int(s.rows[i]) for i in members])}: {len(members)} replicate samples at time {t:g} kept")
    return tuple(flags)
