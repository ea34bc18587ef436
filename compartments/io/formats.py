"""Any supported source to a :class:`RawTable` of text cells.

Every format is reduced to the same thing: a header and columns of stripped text, with
the source row number of each data row. Parsing numbers, date-times and censored values
happens later, in one place (:mod:`.values`), so a CSV file, a workbook and a DataFrame
holding the same data read the same.

Row numbers: for delimited text, the line number (header = 1); for workbooks, the sheet
row; for Parquet files and DataFrames, the position + 2, as if written to CSV with a
header line.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..errors import DataError
from .decode import decode_text
from .delimited import parse_delimited
from .notes import ReadNote
from .rowlist import names_text

TEXT_SUFFIXES = {".csv": ",", ".tsv": "\t", ".tab": "\t", ".txt": ","}
EXCEL_SUFFIXES = (".xlsx", ".xlsm", ".xls")
PARQUET_SUFFIXES = (".parquet", ".pq")
KNOWN = ", ".join([*TEXT_SUFFIXES, *EXCEL_SUFFIXES, *PARQUET_SUFFIXES])


@dataclass
class RawTable:
    """A table as text: what was in the file, before any interpretation.

    Attributes
    ----------
    header : list of str
        Column names as written (stripped); an empty name becomes ``"column N"``.
    columns : list of list of str
        ``columns[j][i]`` is the text of data row ``i`` in column ``j``.
    rows : list of int
        Source row number of each data row.
    path : str or None
        Shown in messages (``"<DataFrame>"`` for a DataFrame).
    sha256 : str or None
        Of the file bytes.
    format : str
        ``"csv"``, ``"xlsx"``, ``"parquet"``, ``"DataFrame"``, ...
    notes : list of ReadNote
    header_row : int
        Source row of the header (1 unless blank rows come first).
    """

    header: list[str]
    columns: list[list[str]]
    rows: list[int]
    path: str | None
    sha256: str | None
    format: str
    notes: list[ReadNote] = field(default_factory=list)
    header_row: int = 1

    @property
    def n_rows(self) -> int:
        return len(self.rows)


def read_table(source: Any, sheet: str | int | None = None) -> RawTable:
    """Read a file path or a pandas DataFrame into a :class:`RawTable`.

    Parameters
    ----------
    source : str, Path or pandas.DataFrame
    sheet : str or int, optional
        Workbook sheet (name or 0-based position); default the first.

    Raises
    ------
    DataError
        Missing or unreadable file, unknown format, missing sheet, empty file, a header
        with no data rows, duplicated header names.

    Examples
    --------
    >>> t = read_table(pd.DataFrame({"id": [1, 1], "time": [0.0, 0.5]}))
    >>> t.header, t.columns[1], t.rows
    (['id', 'time'], ['0', '0.5'], [2, 3])
    """
    if isinstance(source, pd.DataFrame):
        header = [str(c) for c in source.columns]
        columns = [[cell_text(x) for x in source.iloc[:, j].tolist()] for j in range(source.shape[1])]
        table = RawTable(header, columns, list(range(2, len(source) + 2)), "<DataFrame>", None, "DataFrame")
        return _finish(table)
    if not isinstance(source, (str, Path)):
        raise DataError(
            f"cannot read a {type(source).__name__}; give a file path or a pandas DataFrame"
        )
    path = Path(source)
    shown = str(source)
    if not path.exists():
        raise DataError("no such file; check the path", shown)
    if path.is_dir():
        raise DataError("this is a folder, not a file; give the study file inside it", shown)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise DataError(f"the file cannot be read ({exc.strerror}); check its permissions", shown) from None
    digest = hashlib.sha256(data).hexdigest()
    suffix = path.suffix.lower()
    if not data.strip():
        raise DataError("the file is empty; a study file needs a header line and data rows", shown)
    if sheet is not None and suffix not in EXCEL_SUFFIXES:
        raise DataError(
            f"a sheet ({sheet!r}) was asked for, but this is not an Excel workbook ({', '.join(EXCEL_SUFFIXES)}); "
            "drop the sheet option (--sheet)",
            shown,
        )
    if suffix in TEXT_SUFFIXES:
        table = _read_text(data, shown, TEXT_SUFFIXES[suffix])
        table.format = suffix.lstrip(".")
    elif suffix in EXCEL_SUFFIXES:
        table = _read_excel(path, shown, sheet)
    elif suffix in PARQUET_SUFFIXES:
        table = _read_parquet(path, shown)
    else:
        raise DataError(
            f"unknown file format '{suffix or '(no extension)'}'; use one of {KNOWN}, "
            "or read the file yourself and pass a pandas DataFrame",
            shown,
        )
    table.sha256 = digest
    return _finish(table)


def _read_text(data: bytes, path: str, prefer: str) -> RawTable:
    text, notes = decode_text(data, path)
    header, rows, numbers, header_row = parse_delimited(text, path, prefer)
    columns = [[r[j] for r in rows] for j in range(len(header))]
    return RawTable(header, columns, numbers, path, None, "csv", notes, header_row)


def _read_excel(path: Path, shown: str, sheet: str | int | None) -> RawTable:
    if path.suffix.lower() == ".xls":
        try:
            import xlrd  # noqa: F401
        except ImportError:
            raise DataError(
                "reading old .xls workbooks needs the optional package xlrd; "
                "save the sheet as .xlsx or CSV, or install xlrd",
                shown,
            ) from None
    try:
        book = pd.ExcelFile(path)
    except Exception as exc:  # openpyxl raises many types for a damaged file
        raise DataError(
            f"the workbook cannot be opened ({type(exc).__name__}: {exc}); "
            "check it opens in a spreadsheet program, or export the sheet as CSV",
            shown,
        ) from None
    names = [str(n) for n in book.sheet_names]
    notes: list[ReadNote] = []
    with book:
        if sheet is None:
            chosen: str | int = 0
            if len(names) > 1:
                notes.append(ReadNote(None, None, "flagged", f"the workbook has sheets {names_text(names)}; read the first, '{names[0]}' (choose another with sheet=)"))
        elif isinstance(sheet, int):
            if not 0 <= sheet < len(names):
                raise DataError(f"the workbook has no sheet number {sheet} (0-based); its sheets are {names_text(names)}; choose one (--sheet)", shown)
            chosen = sheet
        else:
            if sheet not in names:
                raise DataError(f"the workbook has no sheet '{sheet}'; its sheets are {names_text(names)}; choose one of them (--sheet)", shown)
            chosen = sheet
        frame = pd.read_excel(book, sheet_name=chosen, header=None, dtype=object)
    if frame.shape[0] == 0:
        raise DataError(f"sheet '{names[chosen] if isinstance(chosen, int) else chosen}' is empty; a study sheet needs a header row and data rows", shown)
    filled = [i for i in range(frame.shape[0]) if any(cell_text(x) for x in frame.iloc[i].tolist())]
    top = filled[0] if filled else 0  # blank rows above the header are skipped
    header = [cell_text(x) for x in frame.iloc[top].tolist()]
    body = frame.iloc[top + 1:]
    columns = [[cell_text(x) for x in body.iloc[:, j].tolist()] for j in range(body.shape[1])]
    rows = [int(i) + 1 for i in body.index]  # sheet rows are 1-based
    return RawTable(header, columns, rows, shown, None, path.suffix.lower().lstrip("."), notes, top + 1)


def _read_parquet(path: Path, shown: str) -> RawTable:
    try:
        frame = pd.read_parquet(path)
    except Exception as exc:  # pyarrow raises many types for a damaged file
        raise DataError(
            f"the Parquet file cannot be read ({type(exc).__name__}); check that it is "
            "complete, or export the table as CSV",
            shown,
        ) from None
    header = [str(c) for c in frame.columns]
    columns = [[cell_text(x) for x in frame.iloc[:, j].tolist()] for j in range(frame.shape[1])]
    return RawTable(header, columns, list(range(2, len(frame) + 2)), shown, None, "parquet")


def _finish(table: RawTable) -> RawTable:
    """Shared checks: names for unnamed columns, duplicates, empty rows, no data."""
    header = list(table.header)
    keep = []
    for j, name in enumerate(header):
        if name:
            keep.append(j)
            continue
        if all(not c for c in table.columns[j]):
            table.notes.append(ReadNote(table.header_row, None, "dropped", f"column {j + 1} has no name and no values; ignored"))
            continue
        header[j] = f"column {j + 1}"
        keep.append(j)
    table.header = [header[j] for j in keep]
    table.columns = [table.columns[j] for j in keep]
    seen: dict[str, int] = {}
    for j, name in enumerate(table.header):
        if name in seen:
            raise DataError(
                f"the header names '{name}' twice (columns {seen[name] + 1} and {j + 1}); "
                "give every column a distinct name",
                table.path,
                table.header_row,
                name,
            )
        seen[name] = j
    if not table.header:
        raise DataError("the file has no header; the first line must name the columns", table.path, table.header_row)
    empty = [i for i in range(table.n_rows) if all(not col[i] for col in table.columns)]
    if empty:
        for i in empty:
            table.notes.append(ReadNote(table.rows[i], None, "dropped", "the row is empty"))
        drop = set(empty)
        idx = [i for i in range(table.n_rows) if i not in drop]
        table.rows = [table.rows[i] for i in idx]
        table.columns = [[col[i] for i in idx] for col in table.columns]
    if table.n_rows == 0:
        raise DataError(
            f"the file has a header ({names_text(table.header)}) but no data rows; add the data rows or check that this is the right file",
            table.path,
        )
    return table


def cell_text(x: Any) -> str:
    """The text of one cell from a workbook, Parquet file or DataFrame.

    Missing values become ``""``; integral floats are written without a decimal part
    (``1.0`` -> ``"1"``) so subject numbers read the same from every format; other floats
    use ``repr`` so the number parses back exactly; date-times use ISO 8601.

    Examples
    --------
    >>> [cell_text(v) for v in (None, float("nan"), 3.0, 0.1, " BLQ ", float("inf"))]
    ['', '', '3', '0.1', 'BLQ', 'inf']
    """
    if x is None or x is pd.NA or x is pd.NaT:
        return ""
    if isinstance(x, str):
        return x.strip()
    if isinstance(x, (bool, np.bool_)):
        return str(bool(x))
    if isinstance(x, (int, np.integer)):
        return str(int(x))
    if isinstance(x, (float, np.floating)):
        v = float(x)
        if math.isnan(v):
            return ""
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        if v.is_integer() and abs(v) < 1e15:
            return str(int(v))
        return repr(v)
    if isinstance(x, (pd.Timestamp, _dt.datetime, np.datetime64)):
        ts = pd.Timestamp(x)
        return "" if pd.isna(ts) else ts.isoformat()
    if isinstance(x, _dt.date):
        return x.isoformat()
    if isinstance(x, _dt.time):
        return x.isoformat()
    if isinstance(x, bytes):
        return x.decode("utf-8", errors="replace").strip()
    try:
        if pd.isna(x):
            return ""
    except (TypeError, ValueError):
        pass
    return str(x).strip()
