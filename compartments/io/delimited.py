"""Delimited text (CSV, TSV, semicolon-separated) to rows of text cells."""

from __future__ import annotations

import csv
import io

from ..errors import DataError

DELIMITERS = (",", ";", "\t")
_NAMES = {",": "comma", ";": "semicolon", "\t": "tab"}


def sniff_delimiter(text: str, prefer: str = ",") -> str:
    """Choose the delimiter among comma, semicolon and tab.

    The winner splits the header into the most fields while giving every one of the
    first 50 lines the same number of fields; ``prefer`` breaks ties.

    Examples
    --------
    >>> sniff_delimiter("id;time;conc\\n1;0,5;2\\n")
    ';'
    >>> sniff_delimiter("id\\ttime\\n1\\t2\\n")
    '\\t'
    """
    lines = [ln for ln in text.splitlines() if ln.strip()][:50]
    if not lines:
        return prefer
    best, best_score = prefer, (-1, -1, 0)
    for delim in DELIMITERS:
        try:
            counts = [len(r) for r in csv.reader(lines, delimiter=delim)]
        except csv.Error:  # e.g. a cell over the csv module's size limit: not this delimiter
            continue
        if not counts:
            continue
        consistent = all(c == counts[0] for c in counts)
        score = (int(consistent and counts[0] > 1), counts[0], int(delim == prefer))
        if score > best_score:
            best, best_score = delim, score
    return best


def parse_delimited(
    text: str, path: str | None, prefer: str = ","
) -> tuple[list[str], list[list[str]], list[int], int]:
    """Split delimited text into a header and data rows.

    Blank lines are skipped. Cells are stripped of surrounding spaces; rows shorter than
    the header are padded with empty cells.

    Returns
    -------
    header : list of str
    rows : list of list of str
    row_numbers : list of int
        1-based line number of each data row (header = 1 when the file starts with it).
    header_row : int
        Line number of the header.

    Raises
    ------
    DataError
        A row with more fields than the header.
    """
    delim = sniff_delimiter(text, prefer)
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delim)
    header: list[str] | None = None
    header_row = 1
    rows: list[list[str]] = []
    numbers: list[int] = []
    try:
        for record in reader:
            if not record or all(not c.strip() for c in record) and len(record) <= 1:
                continue
            cells = [c.strip() for c in record]
            if header is None:
                header, header_row = cells, reader.line_num
                continue
            if len(cells) > len(header):
                extra = cells[len(header):]
                if any(extra):
                    raise DataError(
                        f"this row has {len(cells)} fields but the header has {len(header)} "
                        f"({_NAMES[delim]}-separated); quote cells that contain the delimiter "
                        "or add the missing header names",
                        path,
                        reader.line_num,
                    )
                cells = cells[: len(header)]
            cells += [""] * (len(header) - len(cells))
            rows.append(cells)
            numbers.append(reader.line_num)
    except csv.Error as exc:
        raise DataError(
            f"the text cannot be split into cells ({exc}); check the quotes on this line",
            path,
            reader.line_num,
        ) from None
    if header is not None and len(header) == 1:
        _refuse_other_separator(header[0], path, header_row)
    return header or [], rows, numbers, header_row


#: Separators people use that are not read; named when a whole header line is one cell.
_OTHER = (("|", "vertical bars '|'"), (":", "colons ':'"))


def _refuse_other_separator(cell: str, path: str | None, line: int) -> None:
    """A header read as one column that is plainly several names with another separator.

    A study needs at least a time and a value column, so a one-column header is never
    usable; when it splits into names on a separator we do not read, say so.
    """
    found = [what for sep, what in _OTHER if len([p for p in cell.split(sep) if p.strip()]) > 1]
    if found:
        name = found[0]
    elif len(cell.split()) > 1 and not any(ch in cell for ch in "()[]"):
        name = "spaces"
    else:
        return
    raise DataError(
        f"the header is read as one column ({cell[:60]!r}): the cells seem to be separated by {name}; "
        "separate them with commas, semicolons or tabs (e.g. export as CSV)",
        path,
        line,
    )
