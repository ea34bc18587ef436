"""Which column plays which role: a user's mapping, plain-word synonyms, header units.

Roles and the plain words matched (case-insensitive, after removing a unit written in
the header as ``conc (mg/L)`` or ``time [min]``; spaces, ``_``, ``-`` and ``.`` count
as one space):

========== ====================================================
role       matched names
========== ====================================================
subject    subject, id, animal, patient, individual, subject id, patient id, animal id
time       time, t, hours, hour
value      value, conc, concentration, count, level, response
observable observable, analyte, quantity
dose       dose, amount
route      route
duration   duration
rate       rate
lloq       lloq, loq, limit
========== ====================================================

A mapping file (``columns=Path``) is TOML with one ``role = "Column name"`` line per
role, for example::

    subject = "Patient"
    time = "Hours after dose"
    value = "Plasma level (mg/L)"
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from ..errors import DataError, UsageError
from .rowlist import names_text

ROLES = ("subject", "time", "value", "observable", "dose", "route", "duration", "rate", "lloq")
REQUIRED = ("time", "value")
SYNONYMS: dict[str, tuple[str, ...]] = {
    "subject": ("subject", "id", "animal", "patient", "individual", "subject id", "patient id", "animal id"),
    "time": ("time", "t", "hours", "hour"),
    "value": ("value", "conc", "concentration", "count", "level", "response"),
    "observable": ("observable", "analyte", "quantity"),
    "dose": ("dose", "amount"),
    "route": ("route",),
    "duration": ("duration",),
    "rate": ("rate",),
    "lloq": ("lloq", "loq", "limit"),
}
_UNIT = re.compile(r"^(?P<name>.*?)\s*(?:\((?P<u1>[^()]*)\)|\[(?P<u2>[^\[\]]*)\])\s*$")


def split_unit(header: str) -> tuple[str, str]:
    """Split ``"conc (mg/L)"`` into ``("conc", "mg/L")``; no unit gives ``""``.

    Examples
    --------
    >>> split_unit("time [min]"), split_unit("Wt")
    (('time', 'min'), ('Wt', ''))
    """
    m = _UNIT.match(header)
    if not m or not m.group("name"):
        return header.strip(), ""
    return m.group("name").strip(), (m.group("u1") or m.group("u2") or "").strip()


def plain(name: str) -> str:
    """Lower-case a name and collapse separators, for matching."""
    return re.sub(r"[\s_.\-]+", " ", name.strip().lower()).strip()


@dataclass(frozen=True)
class ColumnRoles:
    """The columns of a table and the role each plays.

    Attributes
    ----------
    header : tuple of str
        Column names as written.
    names : tuple of str
        Names with any header unit removed.
    header_units : tuple of str
        Unit written in each header, ``""`` if none.
    roles : dict
        Role -> column index.
    how : dict
        Role -> ``"mapped"`` or ``"matched"``.
    """

    header: tuple[str, ...]
    names: tuple[str, ...]
    header_units: tuple[str, ...]
    roles: dict[str, int]
    how: dict[str, str]

    def column(self, role: str) -> str | None:
        """Header of the column playing ``role``, or None."""
        j = self.roles.get(role)
        return None if j is None else self.header[j]

    def unit(self, role: str) -> str:
        j = self.roles.get(role)
        return "" if j is None else self.header_units[j]

    def others(self) -> list[int]:
        """Indices of columns that play no role (candidate covariates)."""
        used = set(self.roles.values())
        return [j for j in range(len(self.header)) if j not in used]


def load_mapping(columns: Mapping[str, str] | str | Path | None) -> dict[str, str]:
    """Return the role -> column mapping from a dict or a TOML mapping file.

    Raises
    ------
    UsageError
        Unknown role, non-text column name, unreadable mapping file.
    """
    if columns is None:
        return {}
    if isinstance(columns, (str, Path)):
        path = Path(columns)
        try:
            raw = tomllib.loads(path.read_text(encoding="utf-8"))
        except OSError as exc:
            raise UsageError(f"{path}: the column mapping file cannot be read ({exc.strerror})") from None
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise UsageError(
                f"{path}: the column mapping file is not valid TOML ({exc}); "
                'write one line per role, like: time = "Hours after dose"'
            ) from None
        mapping: Mapping[str, object] = raw
        where = f"{path}: "
    elif isinstance(columns, Mapping):
        mapping, where = columns, ""
    else:
        raise UsageError(f"columns= must be a mapping of role to column name or a mapping file path, not {type(columns).__name__}")
    out: dict[str, str] = {}
    for role, name in mapping.items():
        if role not in ROLES:
            raise UsageError(f"{where}unknown column role '{role}'; roles are {', '.join(ROLES)}")
        if not isinstance(name, str) or not name.strip():
            raise UsageError(f"{where}the column for role '{role}' must be a non-empty name, got {name!r}")
        out[role] = name.strip()
    return out


def resolve_columns(
    header: list[str],
    columns: Mapping[str, str] | str | Path | None,
    dose_column: str | None,
    path: str | None,
    header_row: int = 1,
) -> ColumnRoles:
    """Decide which column plays which role.

    A mapped name matches a header exactly, else its unit-free name case-insensitively.
    Roles not mapped are matched by the plain words in the module table.

    Raises
    ------
    DataError
        A mapped column that is not in the file, two columns matching one role, a
        required role (time, value) with no column.
    UsageError
        Unknown role; ``dose_column`` contradicting ``columns``.
    """
    mapping = load_mapping(columns)
    if dose_column is not None:
        if "dose" in mapping and mapping["dose"] != dose_column:
            raise UsageError(
                f"dose_column='{dose_column}' and columns maps dose to '{mapping['dose']}'; give one of them"
            )
        mapping["dose"] = dose_column
    split = [split_unit(h) for h in header]
    names = tuple(n for n, _ in split)
    units = tuple(u for _, u in split)
    found = names_text(header)
    roles: dict[str, int] = {}
    how: dict[str, str] = {}
    for role, wanted in mapping.items():
        hits = [j for j, h in enumerate(header) if h == wanted]
        if not hits:
            hits = [j for j, n in enumerate(names) if plain(n) == plain(split_unit(wanted)[0])]
        if not hits:
            raise DataError(
                f"the column mapping names '{wanted}' for the {role}, but the file has no such column; "
                f"columns found: {found}",
                path,
                header_row,
                wanted,
            )
        if len(hits) > 1:
            raise DataError(
                f"'{wanted}' matches several columns ({', '.join(repr(header[j]) for j in hits)}); "
                "map the exact header text",
                path,
                header_row,
                wanted,
            )
        taken = [r for r, j in roles.items() if j == hits[0]]
        if taken:
            raise UsageError(f"column '{header[hits[0]]}' is mapped to both {taken[0]} and {role}; map each column once")
        roles[role], how[role] = hits[0], "mapped"
    for role in ROLES:
        if role in roles:
            continue
        used = set(roles.values())
        hits = [j for j, n in enumerate(names) if j not in used and plain(n) in SYNONYMS[role]]
        if len(hits) > 1:
            listed = " and ".join(repr(header[j]) for j in hits)
            raise DataError(
                f"columns {listed} could each be the {role}; choose one with "
                f"columns={{'{role}': '{header[hits[0]]}'}} (command line: --map {role}='{header[hits[0]]}')",
                path,
                header_row,
                header[hits[1]],
            )
        if hits:
            roles[role], how[role] = hits[0], "matched"
    for role in REQUIRED:
        if role not in roles:
            words = ", ".join(SYNONYMS[role])
            raise DataError(
                f"no column for the {role}: columns found: {found}, and none is named {words}; "
                f"name it with columns={{'{role}': 'COLUMN'}} (command line: --map {role}=COLUMN)",
                path,
                header_row,
            )
    return ColumnRoles(tuple(header), names, units, roles, how)
