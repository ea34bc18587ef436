"""Reading study files: formats, column mapping, units, values below the limit of quantification.

Each module has one job:

- :mod:`.notes` — :class:`ReadNote`, the record of every row dropped, changed or supplied;
- :mod:`.rowlist` — error messages that name many rows at once;
- :mod:`.decode` — bytes to text (encodings, binary files);
- :mod:`.delimited` — CSV/TSV text to cells (delimiter sniffing);
- :mod:`.formats` — any source (file of any format, DataFrame) to a :class:`RawTable` of text cells;
- :mod:`.columns` — which column plays which role (mapping, synonyms, header units);
- :mod:`.units` — time units, declared units, :func:`check_units`, :func:`units_from_data`;
- :mod:`.values` — one cell of text to a number, a censored value or a date-time;
- :mod:`.records` — the columns of a table parsed into per-row arrays;
- :mod:`.doses` — dose layouts (dose rows, per-subject dose column, dose supplied);
- :mod:`.covariates` — per-subject columns;
- :mod:`.writer` — :func:`write_study`, the inverse of reading.

The public entry point is :func:`compartments.study.read_study`.
"""

from __future__ import annotations

from .notes import ReadNote
from .units import check_units, units_from_data
from .writer import write_study

__all__ = ["ReadNote", "check_units", "units_from_data", "write_study"]
