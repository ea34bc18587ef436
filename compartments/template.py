'''Model templates: the validated, in-memory form of a ``templates/*.toml`` file.

A :class:`Template` is plain data: names, units, bounds and expressions already parsed
into sympy by the restricted parser in :mod:`compartments.expressions`. Compiling it into
fast numpy callables is the job of :mod:`compartments.model`; finding and reading files is
the job of :mod:`compartments.library`. This module turns TOML *text* into a Template
(:func:`parse_template`) and does no file I/O.

Template file format
--------------------
A template is a TOML file (at most 1 MB). Top-level keys::

    name = "one-comp-oral"      # required; letters, digits, '-' and '_'; equals the file stem
    description = "One line"    # required
    note = """Longer note."""   # optional: assumptions, when to use it, units
    kind = "pk"                 # required: "pk" or "biology"
    time_unit = "h"             # required: one of s, min, h, day, week, year

    [settings]                  # optional: fixed numbers, overridable when loading
    n_transit = 3               #   load_template(name, settings={"n_transit": 5})

    [states.depot]              # required, at least one; file order is state order
    unit = "mg"                 # required
    amount = true               # optional (true): a non-negative quantity
    initial = 0                 # optional (0): a number or an expression of parameters
                                #   and settings, e.g. "population - I0"
    description = "..."         # optional

    [parameters.ka]             # required, at least one
    unit = "1/h"                # required
    default = 1.0               # required: typical value, start of a fit
    lower = 0.01                # required: lower < upper, lower <= default <= upper
    upper = 100.0               # required
    log = true                  # optional (true): estimate on the log scale; needs lower > 0
    fixed = false               # optional (false): held at default unless asked to estimate
    description = "..."         # optional

    [equations]                 # required: d(state)/dt for every declared state, once
    depot = "-ka*depot"
    central = "ka*depot - ke*central"

    [doses.oral]                # optional; routes: iv, oral, infusion
    state = "depot"             # required: the state that receives the dose
    bioavailability = "1"       # optional (1): number or expression of parameters/settings
    lag = "tlag"                # optional: name of a lag-time parameter (lower >= 0)

    [observables.concentration] # required, at least one
    expression = "central / V"  # required: must involve at least one state
    unit = "mg/L"               # required
    description = "..."         # optional

    [derived.half_life]         # optional: parameters, settings and earlier derived names
    expression = "log(2)/ke"
    unit = "h"
    description = "..."

    [chain]                     # optional: a chain of identical transit states
    name = "transit"            # required: generates states transit1 .. transitN
    count = "n_transit"         # required: a setting holding a whole number 1..50
    rate = "ktr"                # required: expression of parameters and settings
    from = "depot"              # required: the declared state feeding the chain
    unit = "mg"                 # optional (the unit of `from`)
    description = "..."         # optional

The chain generates, after the ``from`` state in state order,
``transit1' = ktr*depot - ktr*transit1`` and
``transit_k' = ktr*transit_{k-1} - ktr*transit_k``; the alias ``transit_out`` (chain name
plus ``_out``) stands for the last transit state in equations and observables. The author
writes the ``from`` state's own equation.

Expressions use the grammar of :func:`compartments.expressions.parse_expression`. Settings
are substituted as numbers. Names (states, parameters, settings, observables, derived,
chain) are ASCII identifiers that do not start with ``_``, are not Python keywords, and are
not reserved (``t`` and the function names ``exp log sqrt abs min max piecewise``). A name
is declared once across states, parameters, settings, observables and derived quantities,
with one exception: an observable may share the name of a state when its expression is
exactly that state (``[observables.prey] expression = "prey"``). Every parameter must be
used by an equation, observable, initial value, dose entry or the chain rate.
'''

from __future__ import annotations

import keyword
import math
import re
import tomllib
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import sympy as sp

from .dosing import ROUTES
from .errors import ExpressionError, TemplateError
from .expressions import RESERVED_NAMES, parse_expression

__all__ = [
    "KINDS",
    "MAX_CHAIN",
    "MAX_PARAMETERS",
    "MAX_STATES",
    "MAX_TEMPLATE_BYTES",
    "TIME_UNITS",
    "Derived",
    "DoseInput",
    "FrozenMap",
    "Observable",
    "Parameter",
    "State",
    "Template",
    "parse_template",
]

#: Kinds of template.
KINDS = ("pk", "biology")
#: Accepted time units.
TIME_UNITS = ("s", "min", "h", "day", "week", "year")
#: Largest accepted template file, in bytes.
MAX_TEMPLATE_BYTES = 1_000_000
#: Most states (declared plus generated by a chain).
MAX_STATES = 200
#: Most parameters.
MAX_PARAMETERS = 200
#: Most settings, observables and derived quantities (each).
MAX_ENTRIES = 100
#: Longest transit chain.
MAX_CHAIN = 50

_LARGEST = 1e300
_NAME = re.compile(r"[A-Za-z][A-Za-z0-9_]{0,63}", re.ASCII)
_TEMPLATE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_-]{0,63}", re.ASCII)


class FrozenMap(Mapping):
    """A read-only, ordered, hashable and picklable mapping.

    Used for :attr:`Template.equations`, :attr:`Template.doses` and
    :attr:`Template.settings`, so a Template can travel to worker processes.

    Examples
    --------
    >>> m = FrozenMap({"a": 1})
    >>> m["a"], list(m)
    (1, ['a'])
    """

    __slots__ = ("_data",)

    def __init__(self, data: Mapping | None = None) -> None:
        object.__setattr__(self, "_data", dict(data or {}))

    def __getitem__(self, key: Any) -> Any:
        return self._data[key]

    def __iter__(self) -> Iterator:
        return iter(self._data)

    def __len__(self) -> int:
        return len(self._data)

    def __hash__(self) -> int:
        return hash(tuple(self._data.items()))

    def __eq__(self, other: object) -> bool:
        if isinstance(other, Mapping):
            return dict(self._data) == dict(other)
        return NotImplemented

    def __setattr__(self, name: str, value: Any) -> None:
        raise AttributeError("FrozenMap is read-only")

    def __reduce__(self) -> tuple:
        return (FrozenMap, (self._data,))

    def __repr__(self) -> str:
        return f"FrozenMap({self._data!r})"


@dataclass(frozen=True)
class Parameter:
    """A model parameter.

    Attributes
    ----------
    name : str
    unit : str
    default : float
        Typical value; also the default starting point of a fit.
    lower, upper : float
        Bounds (``lower <= default <= upper``).
    log : bool
        Estimate on the log scale (needs ``lower > 0``).
    description : str
    fixed : bool
        Held at ``default`` unless the user asks for it to be estimated (e.g. ``tlag``).
    """

    name: str
    unit: str
    default: float
    lower: float
    upper: float
    log: bool = True
    description: str = ""
    fixed: bool = False


@dataclass(frozen=True)
class State:
    """A state variable (compartment amount, population count, ...).

    ``initial`` is a sympy expression of parameters and settings (0 for compartments
    that receive doses as events).
    """

    name: str
    unit: str
    initial: sp.Expr
    amount: bool = True  # non-negative quantity
    description: str = ""


@dataclass(frozen=True)
class DoseInput:
    """Where a route's dose enters.

    Attributes
    ----------
    route : {"iv", "oral", "infusion"}
    state : str
        The state that receives the dose.
    bioavailability : sympy.Expr
        Fraction of the amount that arrives (1 unless the template says otherwise).
    lag : str or None
        Name of a lag-time parameter, if any.
    """

    route: str
    state: str
    bioavailability: sp.Expr = sp.Integer(1)
    lag: str | None = None


@dataclass(frozen=True)
class Observable:
    """A measured quantity as an expression of states, parameters and settings."""

    name: str
    expression: sp.Expr
    unit: str
    description: str = ""


@dataclass(frozen=True)
class Derived:
    """A secondary quantity computed from the parameters (half-life, clearance, ...)."""

    name: str
    expression: sp.Expr
    unit: str
    description: str = ""


@dataclass(frozen=True)
class Template:
    """A validated model template.

    ``equations`` maps each state name to its right-hand side (sympy) in state order;
    ``settings`` are fixed numbers of the template (e.g. number of transit compartments,
    population size) already substituted where they shape the model.
    """

    name: str
    description: str
    note: str
    kind: str
    states: tuple[State, ...]
    parameters: tuple[Parameter, ...]
    equations: Mapping[str, sp.Expr]
    doses: Mapping[str, DoseInput]
    observables: tuple[Observable, ...]
    derived: tuple[Derived, ...] = ()
    settings: Mapping[str, float] = field(default_factory=FrozenMap)
    time_unit: str = "h"
    source: str | None = None  # path of the file it came from

    @property
    def state_names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.states)

    def with_units(self, rewrite: Callable[[str], str]) -> Template:
        """The same template with every unit text passed through ``rewrite`` (labels only:
        equations, values and bounds are unchanged; the compiled model is shared).

        Examples
        --------
        >>> from compartments import load_template
        >>> t = load_template("one-comp-oral").with_units(lambda u: u.replace("L", "L/kg"))
        >>> t.parameter("V").unit, t.parameter("ke").unit
        ('L/kg', '1/h')
        """
        return replace(
            self,
            states=tuple(replace(x, unit=rewrite(x.unit)) for x in self.states),
            parameters=tuple(replace(x, unit=rewrite(x.unit)) for x in self.parameters),
            observables=tuple(replace(x, unit=rewrite(x.unit)) for x in self.observables),
            derived=tuple(replace(x, unit=rewrite(x.unit)) for x in self.derived),
        )

    @property
    def parameter_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.parameters)

    @property
    def observable_names(self) -> tuple[str, ...]:
        return tuple(o.name for o in self.observables)

    def parameter(self, name: str) -> Parameter:
        for p in self.parameters:
            if p.name == name:
                return p
        raise KeyError(name)

    def observable(self, name: str) -> Observable:
        for o in self.observables:
            if o.name == name:
                return o
        raise KeyError(name)

    def symbols(self) -> dict[str, sp.Symbol]:
        """Sympy symbols for every state and parameter name (real-valued)."""
        names = list(self.state_names) + list(self.parameter_names)
        return {n: sp.Symbol(n, real=True) for n in names}


# --------------------------------------------------------------------------- parsing

_TOP = {
    "name": True,
    "description": True,
    "note": False,
    "kind": True,
    "time_unit": True,
    "settings": False,
    "states": True,
    "parameters": True,
    "equations": True,
    "doses": False,
    "observables": True,
    "derived": False,
    "chain": False,
}
_STATE_KEYS = {"unit": True, "amount": False, "initial": False, "description": False}
_PARAMETER_KEYS = {
    "unit": True,
    "default": True,
    "lower": True,
    "upper": True,
    "log": False,
    "fixed": False,
    "description": False,
}
_DOSE_KEYS = {"state": True, "bioavailability": False, "lag": False}
_OBSERVABLE_KEYS = {"expression": True, "unit": True, "description": False}
_DERIVED_KEYS = _OBSERVABLE_KEYS
_CHAIN_KEYS = {
    "name": True,
    "count": True,
    "rate": True,
    "from": True,
    "unit": False,
    "description": False,
}


def _type_name(value: object) -> str:
    if isinstance(value, bool):
        return f"true/false ({str(value).lower()})"
    if isinstance(value, str):
        shown = value if len(value) <= 30 else value[:27] + "..."
        return f"text {shown!r}"
    if isinstance(value, int):
        return f"integer {value}" if abs(value) < 10**15 else "a very large integer"
    if isinstance(value, float):
        return f"number {value!r}"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "an array"
    return f"a {type(value).__name__}"


def _real(symbol_name: str) -> sp.Symbol:
    return sp.Symbol(symbol_name, real=True)


class _LineIndex:
    """Best-effort map from dotted TOML keys to the line that defines them."""

    _HEADER = re.compile(r"^\s*\[\s*([^\[\]#]+?)\s*\]\s*(?:#.*)?$")
    _KEY = re.compile(
        r"""^\s*((?:[A-Za-z0-9_-]+|"[^"\n]*"|'[^'\n]*')"""
        r"""(?:\s*\.\s*(?:[A-Za-z0-9_-]+|"[^"\n]*"|'[^'\n]*'))*)\s*="""
    )

    def __init__(self, text: str) -> None:
        self.lines: dict[tuple[str, ...], int] = {}
        table: tuple[str, ...] = ()
        in_string: str | None = None
        for number, line in enumerate(text.splitlines(), start=1):
            if in_string is not None:
                if line.count(in_string) % 2 == 1:
                    in_string = None
                continue
            header = self._HEADER.match(line)
            if header:
                table = self._split(header.group(1))
                self._add(table, number)
                continue
            key = self._KEY.match(line)
            if key:
                self._add(table + self._split(key.group(1)), number)
                rest = line[key.end() :]
                for delim in ('"""', "'''"):
                    if rest.count(delim) % 2 == 1:
                        in_string = delim
                        break

    @staticmethod
    def _split(dotted: str) -> tuple[str, ...]:
        parts = re.findall(r""""[^"]*"|'[^']*'|[^.]+""", dotted)
        return tuple(p.strip().strip("\"'").strip() for p in parts)

    def _add(self, key: tuple[str, ...], number: int) -> None:
        for i in range(1, len(key) + 1):
            self.lines.setdefault(key[:i], number)

    def line(self, key: tuple[str, ...]) -> int | None:
        for i in range(len(key), 0, -1):
            if key[:i] in self.lines:
                return self.lines[key[:i]]
        return None


class _Reader:
    """Holds the text, path and line index; raises located TemplateErrors."""

    def __init__(self, text: str, path: str | None) -> None:
        self.text = text
        self.path = path
        self._index: _LineIndex | None = None

    def where(self, key: tuple[str, ...]) -> str | None:
        if not key:
            return None
        if self._index is None:
            self._index = _LineIndex(self.text)
        dotted = ".".join(key)
        line = self._index.line(key)
        return f"line {line}, {dotted}" if line is not None else dotted

    def fail(self, message: str, key: tuple[str, ...] = ()) -> TemplateError:
        return TemplateError(message, path=self.path, where=self.where(key))

    # ---------------------------------------------------------------- checkers
    def table(self, value: object, key: tuple[str, ...]) -> dict:
        if not isinstance(value, dict):
            raise self.fail(f"[{'.'.join(key)}] must be a table, got {_type_name(value)}", key)
        return value

    def keys(self, table: dict, key: tuple[str, ...], spec: Mapping[str, bool]) -> None:
        allowed = ", ".join(spec)
        label = f"in [{'.'.join(key)}]" if key else "at the top level"
        for k in table:
            if k not in spec:
                raise self.fail(f"unknown key {k!r} {label}; allowed keys: {allowed}", key + (k,))
        for k, required in spec.items():
            if required and k not in table:
                raise self.fail(f"missing required key {k!r} {label}", key)

    def text_value(self, value: object, key: tuple[str, ...], limit: int = 1000) -> str:
        if not isinstance(value, str):
            raise self.fail(f"{'.'.join(key)} must be text, got {_type_name(value)}", key)
        if len(value) > limit:
            raise self.fail(
                f"{'.'.join(key)} is {len(value)} characters long; the limit is {limit}", key
            )
        return value

    def unit(self, value: object, key: tuple[str, ...]) -> str:
        unit = self.text_value(value, key, limit=40)
        if not unit.strip() or not unit.isprintable():
            raise self.fail(f"{'.'.join(key)} must be a short printable unit such as 'mg/L'", key)
        return unit.strip()

    def flag(self, value: object, key: tuple[str, ...]) -> bool:
        if not isinstance(value, bool):
            raise self.fail(f"{'.'.join(key)} must be true or false, got {_type_name(value)}", key)
        return value

    def number(self, value: object, key: tuple[str, ...]) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.fail(f"{'.'.join(key)} must be a number, got {_type_name(value)}", key)
        if isinstance(value, int) and abs(value) > _LARGEST:
            raise self.fail(f"{'.'.join(key)} is larger than {_LARGEST:g}", key)
        if not math.isfinite(value) or abs(value) > _LARGEST:
            raise self.fail(f"{'.'.join(key)} must be a finite number, got {value!r}", key)
        return value

    def name(self, name: str, key: tuple[str, ...], what: str) -> str:
        if name.startswith("_"):
            raise self.fail(f"{what} name {name!r} must not start with '_'", key)
        if not _NAME.fullmatch(name):
            raise self.fail(
                f"{what} name {name!r} is not a valid name; use letters, digits and '_',"
                " starting with a letter (at most 64 characters)",
                key,
            )
        if name in RESERVED_NAMES or keyword.iskeyword(name):
            raise self.fail(
                f"{what} name {name!r} is reserved; reserved names are t, the function names"
                " (exp, log, sqrt, abs, min, max, piecewise) and Python keywords",
                key,
            )
        return name

    def expression(
        self,
        value: object,
        key: tuple[str, ...],
        names: Mapping[str, sp.Expr],
        constants: Mapping[str, float],
    ) -> sp.Expr:
        if isinstance(value, bool):
            raise self.fail(
                f"{'.'.join(key)} must be an expression or a number, got {_type_name(value)}", key
            )
        if isinstance(value, (int, float)):
            return parse_expression(repr(self.number(value, key)), {})
        if not isinstance(value, str):
            raise self.fail(
                f"{'.'.join(key)} must be an expression (text) or a number, got {_type_name(value)}",
                key,
            )
        try:
            return parse_expression(value, names, constants=constants)
        except ExpressionError as exc:
            raise self.fail(str(exc), key) from None


def parse_template(
    text: str,
    path: str | None = None,
    settings: Mapping[str, float] | None = None,
) -> Template:
    """Validate template text (TOML) into a :class:`Template`.

    Parameters
    ----------
    text : str
        The TOML text; the format is described at the top of this module.
    path : str, optional
        The file it came from, used in error messages and stored as ``source``.
    settings : mapping of str to float, optional
        Overrides for the template's ``[settings]`` (e.g. ``{"n_transit": 5}``).

    Returns
    -------
    Template

    Raises
    ------
    TemplateError
        If the text is not valid TOML or not a valid template; the message names the file
        and the line or key at fault.

    Examples
    --------
    >>> t = parse_template(\'\'\'
    ... name = "decay"
    ... description = "First-order decay"
    ... kind = "biology"
    ... time_unit = "h"
    ... [states.x]
    ... unit = "mg"
    ... initial = "x0"
    ... [parameters.k]
    ... unit = "1/h"
    ... default = 0.5
    ... lower = 0.001
    ... upper = 10
    ... [parameters.x0]
    ... unit = "mg"
    ... default = 1
    ... lower = 0.01
    ... upper = 100
    ... [equations]
    ... x = "-k*x"
    ... [observables.amount]
    ... expression = "x"
    ... unit = "mg"
    ... \'\'\')
    >>> t.equations["x"]
    -k*x
    """
    path = None if path is None else str(path)
    reader = _Reader("", path)
    if not isinstance(text, str):
        raise reader.fail(f"template text must be a string, got {type(text).__name__}")
    if (
        len(text) > MAX_TEMPLATE_BYTES
        or len(text.encode("utf-8", "surrogatepass")) > MAX_TEMPLATE_BYTES
    ):
        raise reader.fail(
            f"template is larger than {MAX_TEMPLATE_BYTES // 1_000_000} MB; a template"
            " should be a few kilobytes - check that this is the right file"
        )
    reader.text = text
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        message = str(exc)
        found = re.search(r"\(at line (\d+), column (\d+)\)", message)
        where = None
        if found:
            where = f"line {found.group(1)}"
            message = message[: found.start()].strip()
        elif "end of document" in message:
            where = f"line {text.count(chr(10)) + 1}"
        raise TemplateError(
            f"not valid TOML: {message}; fix the syntax (the format is described in"
            " compartments.template)",
            path=path,
            where=where,
        ) from None
    except RecursionError:
        raise reader.fail("not valid TOML: arrays or tables nested too deeply") from None
    except ValueError as exc:  # e.g. an integer with thousands of digits
        raise reader.fail(f"not valid TOML: {exc}".split(";")[0]) from None
    return _Builder(reader, doc, settings).build()


class _Builder:
    """Walks the parsed TOML document and builds the Template, checking as it goes."""

    def __init__(self, reader: _Reader, doc: dict, overrides: Mapping[str, float] | None) -> None:
        self.r = reader
        self.doc = doc
        self.overrides = overrides
        self.declared: dict[str, str] = {}  # name -> dotted key that declared it

    def declare(self, name: str, key: tuple[str, ...], what: str) -> None:
        self.r.name(name, key, what)
        if name in self.declared:
            raise self.r.fail(
                f"name {name!r} is used twice: {self.declared[name]} and {'.'.join(key)};"
                " names must be unique across states, parameters, settings, observables"
                " and derived quantities",
                key,
            )
        self.declared[name] = ".".join(key)

    def build(self) -> Template:
        r, doc = self.r, self.doc
        r.keys(doc, (), _TOP)
        name = r.text_value(doc["name"], ("name",), limit=64)
        if not _TEMPLATE_NAME.fullmatch(name):
            raise r.fail(
                f"template name {name!r} must use letters, digits, '-' and '_' only", ("name",)
            )
        description = r.text_value(doc["description"], ("description",))
        note = r.text_value(doc.get("note", ""), ("note",), limit=20_000)
        kind = r.text_value(doc["kind"], ("kind",))
        if kind not in KINDS:
            raise r.fail(f"kind {kind!r} is unknown; use one of {', '.join(KINDS)}", ("kind",))
        time_unit = r.text_value(doc["time_unit"], ("time_unit",))
        if time_unit not in TIME_UNITS:
            raise r.fail(
                f"time_unit {time_unit!r} is unknown; use one of {', '.join(TIME_UNITS)}",
                ("time_unit",),
            )

        settings = self.settings()
        raw_states = self.section("states", MAX_STATES, required=True)
        raw_params = self.section("parameters", MAX_PARAMETERS, required=True)
        raw_obs = self.section("observables", MAX_ENTRIES, required=True)
        raw_derived = self.section("derived", MAX_ENTRIES, required=False)

        for s in raw_states:
            self.declare(s, ("states", s), "state")
        for p in raw_params:
            self.declare(p, ("parameters", p), "parameter")
        for d in raw_derived:
            self.declare(d, ("derived", d), "derived")

        parameters = tuple(self.parameter(p, raw_params[p]) for p in raw_params)
        param_symbols = {p.name: _real(p.name) for p in parameters}

        chain = self.chain(settings, raw_states, param_symbols)
        order: list[str] = []
        for s in raw_states:
            order.append(s)
            if chain is not None and chain["from"] == s:
                order.extend(chain["states"])
        if len(order) > MAX_STATES:
            raise r.fail(
                f"the template has {len(order)} states with the chain; the limit is {MAX_STATES}",
                ("chain", "count"),
            )
        state_symbols = {s: _real(s) for s in order}

        states = []
        used: set[sp.Symbol] = set()
        for s in order:
            if chain is not None and s in chain["states"]:
                states.append(State(s, chain["unit"], sp.Integer(0), True, chain["description"]))
            else:
                state = self.state(s, raw_states[s], param_symbols, settings, parameters)
                used |= state.initial.free_symbols
                states.append(state)

        names: dict[str, sp.Expr] = {**state_symbols, **param_symbols}
        if chain is not None:
            names[chain["alias"]] = state_symbols[chain["states"][-1]]
            used |= chain["rate"].free_symbols
        equations = self.equations(order, names, settings, chain, state_symbols)
        for rhs in equations.values():
            used |= rhs.free_symbols

        doses = self.doses(state_symbols, param_symbols, settings, parameters)
        for dose in doses.values():
            used |= dose.bioavailability.free_symbols
            if dose.lag is not None:
                used.add(param_symbols[dose.lag])

        observables = tuple(
            self.observable(o, raw_obs[o], names, settings, state_symbols) for o in raw_obs
        )
        for obs in observables:
            used |= obs.expression.free_symbols

        derived: list[Derived] = []
        derived_names: dict[str, sp.Expr] = dict(param_symbols)
        for d in raw_derived:
            item = self.derived(d, raw_derived[d], derived_names, settings)
            derived_names[d] = item.expression
            derived.append(item)

        for p in parameters:
            if param_symbols[p.name] not in used:
                raise r.fail(
                    f"parameter {p.name!r} is not used by any equation, observable, initial"
                    " value, dose entry or chain rate; use it or remove it",
                    ("parameters", p.name),
                )

        return Template(
            name=name,
            description=description,
            note=note,
            kind=kind,
            states=tuple(states),
            parameters=parameters,
            equations=FrozenMap(equations),
            doses=FrozenMap(doses),
            observables=observables,
            derived=tuple(derived),
            settings=FrozenMap(settings),
            time_unit=time_unit,
            source=r.path,
        )

    # ----------------------------------------------------------------- sections
    def section(self, key: str, limit: int, required: bool) -> dict:
        r = self.r
        if key not in self.doc:
            return {}
        table = r.table(self.doc[key], (key,))
        if required and not table:
            raise r.fail(f"[{key}] must declare at least one entry", (key,))
        if len(table) > limit:
            raise r.fail(f"[{key}] has {len(table)} entries; the limit is {limit}", (key,))
        return table

    def settings(self) -> dict[str, float]:
        r = self.r
        raw = self.section("settings", MAX_ENTRIES, required=False)
        values: dict[str, float] = {}
        for k, v in raw.items():
            self.declare(k, ("settings", k), "setting")
            values[k] = r.number(v, ("settings", k))
        if self.overrides is None:
            return values
        if not isinstance(self.overrides, Mapping):
            raise r.fail(
                f"settings overrides must be a mapping of name to number, got"
                f" {type(self.overrides).__name__}"
            )
        for k, v in self.overrides.items():
            if k not in values:
                known = ", ".join(values) if values else "none"
                raise TemplateError(
                    f"unknown setting {k!r}; this template's settings: {known}",
                    path=r.path,
                    where="settings",
                )
            if (
                isinstance(v, bool)
                or not isinstance(v, (int, float))
                or not (math.isfinite(v) and abs(v) <= _LARGEST)
            ):
                raise TemplateError(
                    f"setting {k!r} must be a finite number, got {v!r}",
                    path=r.path,
                    where="settings",
                )
            values[k] = v
        return values

    def parameter(self, name: str, raw: object) -> Parameter:
        r = self.r
        key = ("parameters", name)
        table = r.table(raw, key)
        r.keys(table, key, _PARAMETER_KEYS)
        unit = r.unit(table["unit"], key + ("unit",))
        default = r.number(table["default"], key + ("default",))
        lower = r.number(table["lower"], key + ("lower",))
        upper = r.number(table["upper"], key + ("upper",))
        log = r.flag(table.get("log", True), key + ("log",))
        fixed = r.flag(table.get("fixed", False), key + ("fixed",))
        description = r.text_value(table.get("description", ""), key + ("description",))
        if not lower < upper:
            raise r.fail(
                f"parameter {name!r}: lower ({lower:g}) must be below upper ({upper:g})",
                key + ("lower",),
            )
        if not lower <= default <= upper:
            raise r.fail(
                f"parameter {name!r}: default {default:g} is outside [{lower:g}, {upper:g}];"
                " move the default or widen the bounds",
                key + ("default",),
            )
        if log and not lower > 0:
            raise r.fail(
                f"parameter {name!r}: log = true (the default) needs lower > 0, got"
                f" {lower:g}; set log = false or raise lower",
                key + ("lower",),
            )
        return Parameter(
            name=name,
            unit=unit,
            default=float(default),
            lower=float(lower),
            upper=float(upper),
            log=log,
            description=description,
            fixed=fixed,
        )

    def chain(
        self,
        settings: Mapping[str, float],
        raw_states: Mapping[str, object],
        param_symbols: Mapping[str, sp.Symbol],
    ) -> dict | None:
        r = self.r
        if "chain" not in self.doc:
            return None
        key = ("chain",)
        table = r.table(self.doc["chain"], key)
        r.keys(table, key, _CHAIN_KEYS)
        base = r.text_value(table["name"], key + ("name",))
        r.name(base, key + ("name",), "chain")
        count_name = r.text_value(table["count"], key + ("count",))
        if count_name not in settings:
            known = ", ".join(settings) if settings else "none declared"
            raise r.fail(
                f"chain count {count_name!r} must name a setting (settings: {known})",
                key + ("count",),
            )
        count = settings[count_name]
        if not (float(count).is_integer() and 1 <= count <= MAX_CHAIN):
            raise r.fail(
                f"chain count {count_name} = {count!r} must be a whole number from 1 to"
                f" {MAX_CHAIN}",
                key + ("count",),
            )
        count = int(count)
        source = r.text_value(table["from"], key + ("from",))
        if source not in raw_states:
            raise r.fail(
                f"chain source {source!r} is not a declared state; states: {', '.join(raw_states)}",
                key + ("from",),
            )
        rate = r.expression(table["rate"], key + ("rate",), param_symbols, settings)
        source_table = raw_states[source]
        default_unit = source_table.get("unit", "") if isinstance(source_table, dict) else ""
        unit = r.unit(table.get("unit", default_unit), key + ("unit",))
        description = r.text_value(table.get("description", ""), key + ("description",))
        generated = [f"{base}{k}" for k in range(1, count + 1)]
        alias = f"{base}_out"
        for n in generated + [alias]:
            r.name(n, key + ("name",), "chain")
            if n in self.declared:
                raise r.fail(
                    f"chain name {base!r} generates {n!r}, which is already declared at"
                    f" {self.declared[n]}; rename the chain",
                    key + ("name",),
                )
        for n in generated:
            self.declared[n] = "chain"
        self.declared[alias] = "chain"
        return {
            "states": generated,
            "alias": alias,
            "from": source,
            "rate": rate,
            "unit": unit,
            "description": description or f"transit state of the {base} chain",
        }

    def state(
        self,
        name: str,
        raw: object,
        param_symbols: Mapping[str, sp.Symbol],
        settings: Mapping[str, float],
        parameters: tuple[Parameter, ...],
    ) -> State:
        r = self.r
        key = ("states", name)
        table = r.table(raw, key)
        r.keys(table, key, _STATE_KEYS)
        unit = r.unit(table["unit"], key + ("unit",))
        amount = r.flag(table.get("amount", True), key + ("amount",))
        description = r.text_value(table.get("description", ""), key + ("description",))
        initial = r.expression(table.get("initial", 0), key + ("initial",), param_symbols, settings)
        if amount:
            at_defaults = {param_symbols[p.name]: p.default for p in parameters}
            try:
                value = complex(initial.subs(at_defaults))
            except (TypeError, ValueError, ArithmeticError):
                value = None
            if value is not None and value.imag == 0 and value.real < 0:
                raise r.fail(
                    f"state {name!r} is a non-negative amount but its initial value is"
                    f" {value.real:g} at the parameter defaults",
                    key + ("initial",),
                )
        return State(name=name, unit=unit, initial=initial, amount=amount, description=description)

    def equations(
        self,
        order: list[str],
        names: Mapping[str, sp.Expr],
        settings: Mapping[str, float],
        chain: dict | None,
        state_symbols: Mapping[str, sp.Symbol],
    ) -> dict[str, sp.Expr]:
        r = self.r
        key = ("equations",)
        table = r.table(self.doc["equations"], key)
        generated = set(chain["states"]) if chain else set()
        for s in table:
            if s in generated:
                raise r.fail(
                    f"{s!r} is generated by [chain] with its own equation; remove this line",
                    key + (s,),
                )
            if s not in state_symbols:
                raise r.fail(
                    f"equation for undeclared state {s!r}; declared states: {', '.join(order)}",
                    key + (s,),
                )
        parsed: dict[str, sp.Expr] = {}
        for s in order:
            if s in generated:
                continue
            if s not in table:
                raise r.fail(f'state {s!r} has no equation; add {s} = "..." under [equations]', key)
            parsed[s] = r.expression(table[s], key + (s,), names, settings)
        if chain is not None:
            rate = chain["rate"]
            previous = state_symbols[chain["from"]]
            for s in chain["states"]:
                current = state_symbols[s]
                parsed[s] = rate * previous - rate * current
                previous = current
        return {s: parsed[s] for s in order}

    def doses(
        self,
        state_symbols: Mapping[str, sp.Symbol],
        param_symbols: Mapping[str, sp.Symbol],
        settings: Mapping[str, float],
        parameters: tuple[Parameter, ...],
    ) -> dict[str, DoseInput]:
        r = self.r
        raw = self.section("doses", MAX_ENTRIES, required=False)
        doses: dict[str, DoseInput] = {}
        for route, entry in raw.items():
            key = ("doses", route)
            if route not in ROUTES:
                raise r.fail(f"unknown route {route!r}; routes are {', '.join(ROUTES)}", key)
            table = r.table(entry, key)
            r.keys(table, key, _DOSE_KEYS)
            state = r.text_value(table["state"], key + ("state",))
            if state not in state_symbols:
                raise r.fail(
                    f"dose route {route!r} enters unknown state {state!r}; states:"
                    f" {', '.join(state_symbols)}",
                    key + ("state",),
                )
            f = r.expression(
                table.get("bioavailability", 1), key + ("bioavailability",), param_symbols, settings
            )
            if f.is_Number and not 0 < f <= 1:
                raise r.fail(f"bioavailability {f} must be in (0, 1]", key + ("bioavailability",))
            lag = None
            if "lag" in table:
                lag = r.text_value(table["lag"], key + ("lag",))
                if lag not in param_symbols:
                    raise r.fail(
                        f"lag {lag!r} is not a parameter; parameters: {', '.join(param_symbols)}",
                        key + ("lag",),
                    )
                lower = next(p.lower for p in parameters if p.name == lag)
                if lower < 0:
                    raise r.fail(
                        f"lag parameter {lag!r} has lower bound {lower:g}; a lag time cannot be"
                        " negative, set lower >= 0",
                        ("parameters", lag, "lower"),
                    )
            doses[route] = DoseInput(route=route, state=state, bioavailability=f, lag=lag)
        return doses

    def observable(
        self,
        name: str,
        raw: object,
        names: Mapping[str, sp.Expr],
        settings: Mapping[str, float],
        state_symbols: Mapping[str, sp.Symbol],
    ) -> Observable:
        r = self.r
        key = ("observables", name)
        r.name(name, key, "observable")
        table = r.table(raw, key)
        r.keys(table, key, _OBSERVABLE_KEYS)
        expression = r.expression(table["expression"], key + ("expression",), names, settings)
        if name in self.declared:
            if not (name in state_symbols and expression == state_symbols[name]):
                raise r.fail(
                    f"name {name!r} is used twice: {self.declared[name]} and {'.'.join(key)};"
                    " an observable may share a name only with the state it equals",
                    key,
                )
        self.declared.setdefault(name, ".".join(key))
        if not expression.free_symbols & set(state_symbols.values()):
            raise r.fail(
                f"observable {name!r} does not involve any state; observables are measured"
                " quantities such as central / V",
                key + ("expression",),
            )
        unit = r.unit(table["unit"], key + ("unit",))
        description = r.text_value(table.get("description", ""), key + ("description",))
        return Observable(name=name, expression=expression, unit=unit, description=description)

    def derived(
        self,
        name: str,
        raw: object,
        names: Mapping[str, sp.Expr],
        settings: Mapping[str, float],
    ) -> Derived:
        r = self.r
        key = ("derived", name)
        table = r.table(raw, key)
        r.keys(table, key, _DERIVED_KEYS)
        expression = r.expression(table["expression"], key + ("expression",), names, settings)
        unit = r.unit(table["unit"], key + ("unit",))
        description = r.text_value(table.get("description", ""), key + ("description",))
        return Derived(name=name, expression=expression, unit=unit, description=description)
