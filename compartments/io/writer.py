"""Write a :class:`~compartments.study.Study` to CSV in the dose-rows layout.

The file reads back with :func:`~compartments.study.read_study` into the same subjects,
observations, censoring, doses and covariates: numbers are written with ``repr`` so they
parse back exactly, censored values as ``<LLOQ``, units in the headers.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ..errors import UsageError
from .columns import SYNONYMS, plain

if TYPE_CHECKING:  # pragma: no cover
    from ..study import Study


def _num(x: float | None) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return ""
    return repr(float(x))


def _cov(x: object) -> str:
    if x is None:
        return ""
    if isinstance(x, float):
        return repr(x)
    return str(x)


def _head(name: str, unit: str) -> str:
    return f"{name} ({unit})" if unit else name


def write_study(study: Study, path: str | Path) -> Path:
    """Write ``study`` as a CSV file of observation rows and dose rows.

    Columns: ``subject``, ``time (<axis unit>)``, ``value``, then ``observable`` and
    ``lloq`` when used, ``dose``, ``route``, ``duration``, ``rate`` when any subject has
    doses, then one column per covariate.

    Parameters
    ----------
    study : Study
    path : str or Path

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    UsageError
        A covariate whose name would read back as a role column.

    Examples
    --------
    Write a study read from any format as a plain CSV (``study`` from :func:`read_study`)::

        write_study(study, "copy.csv")
    """
    path = Path(path)
    units = study.units
    subjects = study.subjects
    has_obs_names = any(o is not None for s in subjects for o in s.observables)
    has_lloq = any(bool(np.isfinite(s.lloq).any()) for s in subjects)
    has_doses = any(s.doses for s in subjects)
    has_infusion = any(d.route == "infusion" for s in subjects for d in s.doses)
    cov_names = list(dict.fromkeys(k for s in subjects for k in s.covariates))
    roles = {w for words in SYNONYMS.values() for w in words}
    for name in cov_names:
        if plain(name) in roles:
            raise UsageError(f"covariate '{name}' would be read back as a role column; rename it before writing")
    header = ["subject", _head("time", study.time_unit), _head("value", units.get("value", ""))]
    if has_obs_names:
        header.append("observable")
    if has_lloq:
        header.append(_head("lloq", units.get("value", "")))
    if has_doses:
        header += [_head("dose", units.get("dose", "")), "route"]
        if has_infusion:
            header += [_head("duration", study.time_unit), "rate"]
    header += [_head(n, units.get(n, "")) for n in cov_names]
    with path.open("w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh)
        out.writerow(header)
        for s in subjects:
            covs = [_cov(s.covariates.get(n)) for n in cov_names]
            events: list[tuple[float, int, list[str]]] = []
            for d in s.doses:
                row = [s.id, _num(d.time), ""]
                row += [""] if has_obs_names else []
                row += [""] if has_lloq else []
                row += [_num(d.amount), d.route]
                if has_infusion:
                    row += [_num(d.duration), _num(d.rate)]
                events.append((d.time, 0, row + covs))
            for i in range(s.n_obs):
                lloq = float(s.lloq[i])
                value = f"<{lloq!r}" if s.censored[i] else _num(float(s.values[i]))
                row = [s.id, _num(float(s.times[i])), value]
                row += [s.observables[i] or ""] if has_obs_names else []
                row += [_num(lloq)] if has_lloq else []
                row += ["", ""] if has_doses else []
                row += ["", ""] if has_infusion else []
                events.append((float(s.times[i]), 1, row + covs))
            events.sort(key=lambda e: (e[0], e[1]))  # stable: keeps replicate order
            for _, _, row in events:
                out.writerow(row)
    return path
