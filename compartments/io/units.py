"""Units: time-unit conversion, declared units, and a plain consistency check.

Times are stored in the unit of the study's time axis (hours unless ``time_axis`` says
otherwise). The unit of the file's times comes from ``time_unit=``, ``units={"time": ...}``
or the time column's header (``time [min]``); when none says, hours are assumed and a
note says so.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import TYPE_CHECKING

from ..errors import DataError, UsageError
from .rowlist import names_text

if TYPE_CHECKING:  # pragma: no cover
    from ..study import Study
    from ..template import Template

HOURS = {"h": 1.0, "min": 1.0 / 60.0, "s": 1.0 / 3600.0, "day": 24.0, "week": 168.0}
_TIME_WORDS = {
    "h": "h", "hr": "h", "hrs": "h", "hour": "h", "hours": "h",
    "min": "min", "mins": "min", "minute": "min", "minutes": "min",
    "s": "s", "sec": "s", "secs": "s", "second": "s", "seconds": "s",
    "d": "day", "day": "day", "days": "day",
    "wk": "week", "week": "week", "weeks": "week",
}


def time_unit_name(text: str) -> str | None:
    """Canonical name of a time unit (``"hours"`` -> ``"h"``), None if unknown.

    Examples
    --------
    >>> time_unit_name("Hours"), time_unit_name("min"), time_unit_name("fortnight")
    ('h', 'min', None)
    """
    return _TIME_WORDS.get(text.strip().lower())


def time_factor(source: str, target: str) -> float:
    """Multiply a time in ``source`` units by this to get ``target`` units.

    Examples
    --------
    >>> time_factor("min", "h") * 90
    1.5
    >>> time_factor("day", "h")
    24.0
    """
    return HOURS[source] / HOURS[target]


def require_time_unit(text: str, what: str) -> str:
    """Canonical time unit or :class:`UsageError` naming the accepted ones."""
    name = time_unit_name(text)
    if name is None:
        raise UsageError(f"{what}={text!r} is not a time unit; use one of {', '.join(HOURS)}")
    return name


def same_unit(a: str, b: str) -> bool:
    """Compare two unit texts leniently (case of the prefix letters, µ/mc/u, spaces)."""
    return _norm(a) == _norm(b)


def _norm(u: str) -> str:
    u = u.strip().replace(" ", "").replace("µ", "u").replace("μ", "u")
    u = re.sub(r"mc(?=g)", "u", u)
    return u.lower()


def declared_units(
    names: tuple[str, ...],
    header_units: tuple[str, ...],
    roles: Mapping[str, int],
    header: tuple[str, ...],
    units: Mapping[str, str] | None,
    time_unit: str | None,
    path: str | None,
    header_row: int = 1,
) -> tuple[dict[str, str], str, bool]:
    """Merge units from the header, ``units=`` and ``time_unit=``.

    Returns
    -------
    units : dict
        Role (``time``, ``value``, ``dose``, ``lloq``, ``rate``, ``duration``) or covariate
        name -> unit text; ``""`` for an unknown role unit.
    source_time_unit : str
        Canonical unit of the file's numeric times.
    assumed : bool
        True when no unit was stated and hours were assumed.

    Raises
    ------
    DataError
        A header unit contradicting ``units=``/``time_unit=``, or an unknown time unit.
    """
    out: dict[str, str] = {role: "" for role in ("time", "value", "dose")}
    where: dict[str, int] = {}
    for role, j in roles.items():
        if header_units[j]:
            out[role] = header_units[j]
            where[role] = j
    role_of = {j: role for role, j in roles.items()}
    for j, name in enumerate(names):
        if j not in role_of and header_units[j]:
            out[name] = header_units[j]
            where[name] = j
    given = dict(units or {})
    if time_unit is not None:
        if "time" in given and time_unit_name(given["time"]) != time_unit_name(time_unit):
            raise UsageError(f"time_unit={time_unit!r} and units={{'time': {given['time']!r}}} disagree; give one")
        given["time"] = time_unit
    known_roles = ("time", "value", "dose", "lloq", "rate", "duration")
    for key in given:
        if key not in known_roles and key not in names and key not in header:
            raise UsageError(
                f"units: {key!r} is neither a column role ({', '.join(known_roles)}) nor a column of the file "
                f"({names_text(names)}); check the name (command line: --units ROLE=UNIT)"
            )
    for key, unit in given.items():
        if not isinstance(unit, str):
            raise UsageError(f"units[{key!r}] must be text like 'mg/L', got {unit!r}")
        old = out.get(key, "")
        if old and not same_unit(old, unit) and not (key == "time" and time_unit_name(old) == time_unit_name(unit)):
            j = where[key]
            raise DataError(
                f"the header gives the unit '{old}' but units= says '{unit}'; correct the header or drop "
                "the unit from units=",
                path,
                header_row,
                header[j],
            )
        out[key] = unit
    assumed = not out["time"]
    if assumed:
        out["time"] = "h"
    canonical = time_unit_name(out["time"])
    if canonical is None:
        col = header[roles["time"]] if "time" in where else None
        raise DataError(
            f"'{out['time']}' is not a time unit I know; use one of {', '.join(HOURS)} "
            "(or hours, minutes, days, weeks)",
            path,
            header_row if col else None,
            col,
        )
    return out, canonical, assumed


# ---------------------------------------------------------------- consistency check

_MASS = {"g": 1.0, "mg": 1e-3, "ug": 1e-6, "ng": 1e-9, "pg": 1e-12}
_MOLES = {"mol": 1.0, "mmol": 1e-3, "umol": 1e-6, "nmol": 1e-9, "pmol": 1e-12}
_VOLUME = {"l": 1.0, "dl": 0.1, "ml": 1e-3, "ul": 1e-6}


def _amount(u: str) -> tuple[str, float] | None:
    """('mass'|'moles', factor to g or mol) for an amount unit."""
    n = _norm(u)
    if n in _MASS:
        return "mass", _MASS[n]
    if n in _MOLES:
        return "moles", _MOLES[n]
    return None


_MOLAR = {"m": 1.0, "mm": 1e-3, "um": 1e-6, "nm": 1e-9, "pm": 1e-12}


def _concentration(u: str) -> tuple[str, float, float] | None:
    """(kind, amount factor, volume in L) for ``amount/volume`` units such as mg/L, and for
    molar units (M = mol/L; mM, µM, nM, pM)."""
    n = _norm(u)
    if n in _MOLAR and u.strip()[-1:] == "M":  # capital M: molar (mol/L), not metres
        return "moles", _MOLAR[n], 1.0
    parts = n.split("/")
    if len(parts) != 2 or parts[1] not in _VOLUME:
        return None
    amount = _amount(parts[0])
    if amount is None:
        return None
    return amount[0], amount[1], _VOLUME[parts[1]]


def _per_kg(dose_unit: str) -> tuple[str, bool]:
    """``("mg", True)`` for "mg/kg": the amount unit and whether doses are per kg of body weight."""
    u = dose_unit.strip()
    base = re.sub(r"/\s*kg$", "", u, flags=re.IGNORECASE).strip()
    return base, base != u


_COMPOSITE_VOLUME = {1.0: "L", 1e-3: "mL", 1e3: "kL", 0.1: "dL", 1e-6: "µL"}


def _litres(dose_unit: str, value_unit: str) -> float | None:
    """Litres in one unit of dose/value (mg and mg/L: 1; mg and µg/L: 1000), per kg or not;
    None unless an amount and an amount per volume of the same kind (mass or moles)."""
    dose_amount, conc = _amount(_per_kg(dose_unit)[0]), _concentration(value_unit)
    if dose_amount is None or conc is None or dose_amount[0] != conc[0]:
        return None
    return dose_amount[1] / conc[1] * conc[2]


def volume_units(dose_unit: str, value_unit: str, time_unit: str) -> tuple[str, str]:
    """Units of a volume (dose / value) and of a clearance (volume / time) estimated from data
    in these units (dimensional analysis, common practice); a dose per kg of body weight
    gives both per kg. ``("", "")`` when a unit is missing; a quotient of the texts when
    they are not an amount and an amount per volume of the same kind.

    Examples
    --------
    >>> volume_units("mg", "mg/L", "h"), volume_units("mg/kg", "mg/L", "h"), volume_units("mg", "ug/L", "h")
    (('L', 'L/h'), ('L/kg', 'L/h/kg'), ('kL', 'kL/h'))
    >>> volume_units("mg", "nmol/L", "h")
    ('(mg)/(nmol/L)', '(mg)/(nmol/L)/h')
    """
    if not dose_unit or not value_unit:
        return "", ""
    litres = _litres(dose_unit, value_unit)
    if litres is None:
        vol = f"({dose_unit})/({value_unit})"
        return vol, f"{vol}/{time_unit}"
    name = next((n for v, n in _COMPOSITE_VOLUME.items() if abs(litres / v - 1.0) < 1e-9), f"({litres:g} L)")
    kg = "/kg" if _per_kg(dose_unit)[1] else ""
    return name + kg, f"{name}/{time_unit}{kg}"


def units_from_data(study: Study, template: Template) -> Template:
    """``template`` with its unit labels in the units the study's data give the estimates.

    A pharmacokinetic template states amounts in one unit (its states', e.g. mg), volumes in
    L and concentrations in amount/L. Fitted to doses in another amount unit, values in
    another concentration unit, or doses per kg of body weight, the same numbers mean
    something else: with Theoph's doses in mg/kg and values in mg/L, V is in L/kg and
    CL in L/h/kg. This rewrites the labels (dimensional analysis, common practice):
    the concentration unit becomes the values' unit, amounts the dose's amount unit,
    volumes ``dose amount / value concentration`` (L, mL, kL, …), and a unit holding an
    amount or a volume gets "/kg" when doses are per kg. Equations and numbers are not
    touched.

    The template is returned unchanged when the study does not state both units, when
    they are not an amount and an amount per volume of the same kind (mass or moles),
    when the template is not a pharmacokinetic one with amount states and a
    concentration observable, or when nothing changes.

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> from compartments import load_template
    >>> study = SimpleNamespace(units={"dose": "mg/kg", "value": "mg/L"})
    >>> t = units_from_data(study, load_template("one-comp-oral"))
    >>> t.parameter("V").unit, [d.unit for d in t.derived if d.name == "CL"], t.observables[0].unit
    ('L/kg', ['L/h/kg'], 'mg/L')
    """
    units = getattr(study, "units", {}) or {}
    dose_u, value_u = units.get("dose", ""), units.get("value", "")
    if template.kind != "pk" or not dose_u or not value_u or not template.observables:
        return template
    dose_base, per_kg = _per_kg(dose_u)
    dose_amount, conc = _amount(dose_base), _concentration(value_u)
    model_conc = template.observables[0].unit
    amounts = {s.unit for s in template.states if s.amount}
    model_amount = amounts.pop() if len(amounts) == 1 else ""
    parsed = _concentration(model_conc)
    if (dose_amount is None or conc is None or dose_amount[0] != conc[0] or parsed is None
            or _amount(model_amount) is None or _norm(model_conc.split("/")[0]) != _norm(model_amount)
            or parsed[2] != 1.0):
        return template
    volume = volume_units(dose_base, value_u, template.time_unit)[0]
    if same_unit(dose_base, model_amount) and same_unit(value_u, model_conc) and volume == "L" and not per_kg:
        return template

    def rewrite(u: str) -> str:
        if not u:
            return u
        if same_unit(u, model_conc):
            return value_u
        parts = re.split(r"([/·*() ])", u)
        changed = False
        for i, part in enumerate(parts):
            if part and same_unit(part, model_amount) and part.strip():
                parts[i], changed = dose_base, True
            elif part == "L":
                parts[i], changed = volume, True
        out = "".join(parts)
        return out + "/kg" if changed and per_kg else out

    return template.with_units(rewrite)


def check_units(study: Study, template: Template) -> list[str]:
    """Sentences about whether the study's units suit the template.

    Checks the time axis against the template's time unit, the value unit against the
    first observable's unit, and what unit a volume estimated from the dose and value
    units comes out in (dose mg with values mg/L gives volumes in L; a dose per kg
    gives volumes in L/kg and clearances in L/h/kg).

    Examples
    --------
    The dose and concentration units of the Theoph data (mg/kg and mg/L) give
    volumes per kilogram::

        check_units(study, template)  # [..., 'doses are per kg: volumes come out in L/kg, clearances in L/h/kg']
    """
    out: list[str] = []
    axis = study.time_unit
    if time_unit_name(template.time_unit) != time_unit_name(axis):
        out.append(
            f"the study's times are in {axis} but template '{template.name}' uses {template.time_unit}; "
            f"convert with study.in_time_unit('{template.time_unit}') or read with time_axis='{template.time_unit}'"
        )
    value_u = study.units.get("value", "")
    dose_u = study.units.get("dose", "")
    if not value_u:
        out.append("the unit of the values is not stated; give it (units={'value': 'mg/L'}; command line: "
                   "--units value=mg/L, or the right unit) to have the estimates labelled in the data's units")
    elif template.observables:
        obs = template.observables[0]
        if obs.unit and not same_unit(obs.unit, value_u):
            out.append(
                f"values are in {value_u} but the template's observable '{obs.name}' is in {obs.unit}; "
                "the estimates take the data's units"
            )
    if not dose_u:
        if any(s.doses for s in study.subjects):
            out.append("the unit of the doses is not stated; give it (units={'dose': 'mg'}; command line: "
                       "--units dose=mg, or the right unit) to have the estimates labelled in the data's units")
        return out
    dose_base, per_kg = _per_kg(dose_u)
    dose_amount = _amount(dose_base)
    conc = _concentration(value_u) if value_u else None
    if dose_amount is None or conc is None:
        if value_u:
            out.append(f"the units {dose_u} (dose) and {value_u} (values) are not both amount and amount/volume; volumes are in {dose_u} per ({value_u})")
        return out
    if dose_amount[0] != conc[0]:
        out.append(f"the dose is in {dose_u} but the values in {value_u} (mass against moles); convert one with the molar mass")
        return out
    litres = dose_amount[1] / conc[1] * conc[2]
    vol, cl = volume_units(dose_u, value_u, study.time_unit)
    if per_kg:
        out.append(f"doses are per kg: volumes come out in {vol}, clearances in {cl}")
    else:
        out.append(f"dose in {dose_u} and values in {value_u}: volumes come out in {vol}, clearances in {cl}")
    if abs(litres - 1.0) > 1e-9:  # not exactly 1 in floating point (1e-3 / 1e-6 · 1e-3)
        out.append("the dose and value units differ in scale; convert one of them if you want volumes in L")
    return out
