"""Bytes to text for delimited files.

Decision: UTF-8 first (a byte-order mark is removed), UTF-16 when the file starts with a
UTF-16 byte-order mark (spreadsheet "Unicode text" exports), otherwise Latin-1 with a
flagged note, because Latin-1 decodes any byte and the reader cannot know the real
encoding. Files with NUL bytes that are not UTF-16, and spreadsheets or Parquet files
under a text name, are refused with the fix.
"""

from __future__ import annotations

from ..errors import DataError
from .notes import ReadNote

# File signatures of binary formats that users sometimes save under a text name.
_SIGNATURES = {
    b"PK\x03\x04": "an Excel workbook (.xlsx)",
    b"\xd0\xcf\x11\xe0": "an old Excel workbook (.xls)",
    b"PAR1": "a Parquet file",
    b"%PDF": "a PDF document",
}


def decode_text(data: bytes, path: str | None) -> tuple[str, list[ReadNote]]:
    """Decode the bytes of a delimited text file.

    Parameters
    ----------
    data : bytes
    path : str or None
        For messages.

    Returns
    -------
    text : str
    notes : list of ReadNote
        One flagged note when the file was not UTF-8.

    Examples
    --------
    >>> decode_text(b"\\xef\\xbb\\xbfid,time\\n", "a.csv")[0]
    'id,time\\n'
    """
    for magic, what in _SIGNATURES.items():
        if data.startswith(magic):
            raise DataError(
                f"the file is {what}, not delimited text; give it the matching file name "
                "(.xlsx, .xls, .parquet) or export it as CSV",
                path,
            )
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        try:
            return data.decode("utf-16"), []
        except UnicodeDecodeError as exc:
            raise DataError(
                f"the file starts like UTF-16 text but byte {exc.start} cannot be decoded; "
                "save it again as UTF-8 CSV",
                path,
            ) from None
    if b"\x00" in data[:65536]:
        raise DataError(
            "the file contains NUL bytes, so it is binary, not a text table; "
            "export it as CSV (UTF-8) or give a spreadsheet its .xlsx name",
            path,
        )
    try:
        return data.decode("utf-8-sig"), []
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        text = data.decode("latin-1")
        if _mostly_control(text):
            raise DataError(
                "the file is not text (mostly control characters); export it as CSV (UTF-8)",
                path,
            ) from None
        note = ReadNote(
            line,
            None,
            "flagged",
            "the file is not valid UTF-8 (first bad byte on this line); read as Latin-1 — "
            "check accented names, or save the file as UTF-8",
        )
        return text, [note]


def _mostly_control(text: str) -> bool:
    """True when more than 10 % of the first 4096 characters are control characters."""
    sample = text[:4096]
    if not sample:
        return False
    bad = sum(1 for ch in sample if ord(ch) < 32 and ch not in "\t\r\n" or 0x7F <= ord(ch) < 0xA0)
    return bad > 0.1 * len(sample)
