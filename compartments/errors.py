"""Exceptions raised by compartments.

Every error a user can cause derives from :class:`CompartmentsError`; the CLI turns it
into one line on stderr and exit code 2. Messages are built first and name the file,
the place (line, key, row, column), what is wrong and what to do.
"""

from __future__ import annotations


class CompartmentsError(Exception):
    """Base class for every error a user can cause."""


class TemplateError(CompartmentsError, ValueError):
    """A model template is malformed, unsafe or inconsistent.

    Attributes
    ----------
    path : str or None
        The template file.
    where : str or None
        The line (``"line 12"``) or key (``"equations.central"``) at fault.
    """

    def __init__(self, message: str, path: str | None = None, where: str | None = None):
        self.path = path
        self.where = where
        self.reason = message
        prefix = ", ".join(p for p in (path, where) if p)
        super().__init__(f"{prefix}: {message}" if prefix else message)


class ExpressionError(CompartmentsError, ValueError):
    """An expression is outside the restricted grammar."""


class DataError(CompartmentsError, ValueError):
    """A study file cannot be used as it stands.

    Attributes
    ----------
    path : str or None
    row : int or None
        1-based row number in the file (header is row 1), or None.
    column : str or None
    """

    def __init__(
        self,
        message: str,
        path: str | None = None,
        row: int | None = None,
        column: str | None = None,
    ):
        self.path = path
        self.row = row
        self.column = column
        self.reason = message
        parts = []
        if path:
            parts.append(str(path))
        if row is not None:
            parts.append(f"row {row}")
        if column is not None:
            parts.append(f"column '{column}'")
        prefix = ", ".join(parts)
        super().__init__(f"{prefix}: {message}" if prefix else message)


class SimulationError(CompartmentsError, RuntimeError):
    """The integrator failed or produced non-finite values."""


class FitError(CompartmentsError, RuntimeError):
    """A fit could not be carried out (e.g. too few observations for the model)."""


class UsageError(CompartmentsError, ValueError):
    """A command-line option or API argument is invalid."""
