"""The read log: one :class:`ReadNote` per row dropped, changed, kept, supplied or flagged."""

from __future__ import annotations

from dataclasses import dataclass

ACTIONS = ("dropped", "changed", "kept", "supplied", "flagged")


@dataclass(frozen=True)
class ReadNote:
    """Something the reader did to the data, and why.

    Attributes
    ----------
    row : int or None
        1-based row in the source file (header = row 1); None for whole-column or
        whole-subject notes.
    column : str or None
        The source column concerned, as written in the header.
    action : {"dropped", "changed", "kept", "supplied", "flagged"}
    reason : str
        One plain sentence.

    Examples
    --------
    >>> str(ReadNote(4, "conc", "changed", "'BLQ' read as censored below 0.1"))
    "row 4, column 'conc': changed — 'BLQ' read as censored below 0.1"
    """

    row: int | None
    column: str | None
    action: str
    reason: str

    def __post_init__(self) -> None:
        if self.action not in ACTIONS:  # a programming error, not a user error
            raise ValueError(f"unknown note action {self.action!r}")

    def __str__(self) -> str:
        where = []
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.column is not None:
            where.append(f"column '{self.column}'")
        prefix = ", ".join(where)
        return f"{prefix}: {self.action} — {self.reason}" if prefix else f"{self.action} — {self.reason}"
