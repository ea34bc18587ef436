"""Structural identifiability of a template before any data: which parameters the outputs
can fix at all, given what is observed and where the doses enter.

Method
------
*Local* identifiability is decided by the rank of the Jacobian of the outputs' Taylor
coefficients at ``t = 0+`` with respect to the parameters, evaluated at random rational
parameter values in exact arithmetic (Sedoglavic 2002, J Symb Comput 33:735; Karlsson,
Anguelova & Jirstrand 2012, IFAC Proc 45(16):941). The coefficients are obtained from the
polynomial "jet" equations of :mod:`compartments.design.jets`, and their derivatives by
implicit differentiation of that triangular system, so no expression swells. A parameter
is locally identifiable when removing its column lowers the rank. The answer holds for
almost all parameter values (it could differ on a set of measure zero that a random
point avoids with high probability).

*Global* identifiability follows Pohjanpalo (1978, Math Biosci 41:21): the Taylor
coefficient equations ``c_k(θ) = c_k(θ*)`` are solved for θ. Here they are solved
exactly by a Gröbner basis (sympy; jets as unknowns, as in Hong et al. 2019,
Bioinformatics 35:2873), with the known random point θ* on the right and the
Rabinowitsch variable keeping denominators and positive parameters away from zero.
Every solution is then checked against Taylor coefficients of higher order (50-digit
arithmetic). One solution: globally identifiable. Several: those parameters that differ
between solutions are only locally identifiable, and ``solutions`` says how many
parameter sets give the same output (2 for the flip-flop pair of the one-compartment
oral model). When some parameters are not identifiable, enough of them are held at θ*
to leave a finite set first.

Combinations of the non-identifiable parameters that the output does fix are found among
simple candidates (products and ratios ``θ_i^{±1}·θ_j^{±1}…``, and sums) whose gradient
lies in the row space of the Jacobian at two random points.

Inputs, as the method needs them: a bolus is an initial condition of the state it enters
(``x(0+) = x0 + F·D``; an oral dose enters the depot), an infusion a constant input;
volumes enter through the observation; each dose route is a separate occasion starting
from the template's initial state; parameters held fixed are known. A lag time shifts
the whole response: when the system is at rest before the dose, it is fixed by the time
the response starts, and the rest of the answer is the one without the lag.

Time is bounded (``timeout``, 10 s by default): on the main thread a timer interrupts
the symbolic work; elsewhere the time is checked between steps and the size of the
equation system is limited. What could not be decided in time is reported as
``"undecided"``, with the reason.

Numerics only: no I/O and no presentation.
"""

from __future__ import annotations

import itertools
import random
import signal
import threading
import time
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import mpmath
import sympy as sp
from sympy.polys.matrices import DomainMatrix

from ..errors import UsageError
from ..template import Template
from .jets import JetSystem, NotRational, Occasion, build_jets

__all__ = ["STATUSES", "IdentifiabilityResult", "identifiability"]

#: What ``status`` may say for a parameter.
STATUSES = ("global", "local", "none", "undecided")
#: Default time bound, in seconds.
TIMEOUT = 10.0
#: Most unknowns (parameters and jets) handed to the Gröbner basis.
MAX_UNKNOWNS = 80
#: Digits used to check solutions against higher-order coefficients.
_DIGITS = 50

METHOD = (
    "Taylor-series coefficients at t = 0+; local: rank of their Jacobian at a random rational "
    "point in exact arithmetic (Sedoglavic 2002; Karlsson, Anguelova & Jirstrand 2012); global: "
    "the coefficient equations solved by a Gröbner basis (Pohjanpalo 1978)"
)


@dataclass(frozen=True)
class IdentifiabilityResult:
    """The structural identifiability of a template's parameters.

    Attributes
    ----------
    template : str
    observed : tuple of str
        The observables assumed measured.
    routes : tuple of str
        The dose routes assumed used (each a separate occasion); empty: no doses.
    known : tuple of str
        Parameters taken as known (held fixed).
    status : dict of str to str
        Per unknown parameter: ``"global"`` (one value fits the output), ``"local"``
        (finitely many values), ``"none"`` (a continuum) or ``"undecided"`` (see ``why``).
    combinations : tuple of sympy.Expr
        Functions of the non-identifiable parameters that the output fixes (locally).
    solutions : int or None
        How many parameter sets (complex ones included) give the same output at the
        checked point; None when not found.
    admissible : int or None
        How many of them are real with the signs the template allows (positive where its
        lower bound is positive).
    alternatives : tuple of dict
        The admissible parameter sets other than the checked point.
    point : dict of str to float
        The random point at which the answer was computed.
    why : dict of str to str
        Reasons, per parameter, where the status needs one.
    notes : tuple of str
    method : str
    order : int
        Highest Taylor order used.
    seconds : float
        Time taken.
    """

    template: str
    observed: tuple[str, ...]
    routes: tuple[str, ...]
    known: tuple[str, ...]
    status: Mapping[str, str]
    combinations: tuple[sp.Expr, ...] = ()
    solutions: int | None = None
    admissible: int | None = None
    alternatives: tuple[Mapping[str, float], ...] = ()
    point: Mapping[str, float] = field(default_factory=dict)
    why: Mapping[str, str] = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    method: str = METHOD
    order: int = 0
    seconds: float = 0.0

    def parameters(self, status: str) -> tuple[str, ...]:
        """The parameters with this status, in template order.

        >>> IdentifiabilityResult("m", ("y",), (), (), {"a": "none", "b": "global"}).parameters("none")
        ('a',)
        """
        if status not in STATUSES:
            raise UsageError(f"status {status!r} is unknown; use one of {', '.join(STATUSES)}")
        return tuple(k for k, v in self.status.items() if v == status)

    @property
    def identifiable(self) -> bool:
        """True when every unknown parameter is globally or locally identifiable."""
        return all(v in ("global", "local") for v in self.status.values())

    def to_dict(self) -> dict[str, Any]:
        """Plain data (JSON-ready); expressions as text."""
        return {
            "template": self.template,
            "observed": list(self.observed),
            "routes": list(self.routes),
            "known": list(self.known),
            "status": dict(self.status),
            "combinations": [str(c) for c in self.combinations],
            "solutions": self.solutions,
            "admissible": self.admissible,
            "alternatives": [dict(a) for a in self.alternatives],
            "point": dict(self.point),
            "why": dict(self.why),
            "notes": list(self.notes),
            "method": self.method,
            "order": self.order,
            "seconds": self.seconds,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> IdentifiabilityResult:
        """Inverse of :meth:`to_dict` (combinations parsed back with the restricted parser)."""
        from ..expressions import parse_expression

        names = {n: sp.Symbol(n, real=True) for n in data["status"]}
        return cls(
            template=data["template"],
            observed=tuple(data["observed"]),
            routes=tuple(data["routes"]),
            known=tuple(data["known"]),
            status=dict(data["status"]),
            combinations=tuple(parse_expression(c.replace("**", "^"), names) for c in data["combinations"]),
            solutions=data.get("solutions"),
            admissible=data.get("admissible"),
            alternatives=tuple(dict(a) for a in data.get("alternatives", ())),
            point=dict(data.get("point", {})),
            why=dict(data.get("why", {})),
            notes=tuple(data.get("notes", ())),
            method=data.get("method", METHOD),
            order=int(data.get("order", 0)),
            seconds=float(data.get("seconds", 0.0)),
        )


class _Undecided(Exception):
    """The global step cannot conclude; the message says why."""


class _OutOfTime(_Undecided):
    pass


@contextmanager
def _time_limit(seconds: float) -> Iterator[bool]:
    """Interrupt the block after ``seconds`` (main thread, POSIX); yields whether armed.

    An outer interval timer (e.g. a test timeout) that would fire first is left alone;
    one that would fire later is re-armed afterwards with its remaining time.
    """
    usable = hasattr(signal, "setitimer") and threading.current_thread() is threading.main_thread()
    if not usable:
        yield False
        return
    outer_delay, outer_interval = signal.getitimer(signal.ITIMER_REAL)
    if outer_delay and outer_delay <= seconds:
        yield False
        return

    def _alarm(signum: int, frame: Any) -> None:
        raise _OutOfTime

    previous = signal.signal(signal.SIGALRM, _alarm)
    started = time.monotonic()
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield True
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)
        if outer_delay:
            left = max(outer_delay - (time.monotonic() - started), 1e-3)
            signal.setitimer(signal.ITIMER_REAL, left, outer_interval)


def _rank(M: sp.Matrix) -> int:
    if M.rows == 0 or M.cols == 0:
        return 0
    return int(DomainMatrix.from_Matrix(M).convert_to(sp.QQ).rank())


def _random_point(template: Template, names: Sequence[str], rng: random.Random) -> dict[str, sp.Rational]:
    """Random rationals near the template defaults (generic, and in the usual range)."""
    out = {}
    for n in names:
        p = template.parameter(n)
        base = sp.Rational(max(1, round(abs(p.default) * 100)), 100) if p.default else sp.Rational(1, 2)
        out[n] = base * sp.Rational(rng.randint(500, 1500), rng.choice((997, 991, 983, 977, 971)))
    return out


@dataclass
class _Setup:
    template: Template
    observed: tuple[str, ...]
    routes: tuple[str, ...]
    known: tuple[str, ...]
    unknown: tuple[str, ...]  # without lag times
    lags: tuple[str, ...]  # unknown lag-time parameters
    occasions: tuple[Occasion, ...]
    point: dict[str, sp.Rational]
    known_values: dict[str, sp.Rational]
    seed: int


def _setup(template: Template, observed: Sequence[str] | None, routes: Sequence[str] | None,
           known: Sequence[str] | None, seed: int) -> _Setup:
    rng = random.Random(seed)
    names = template.observable_names
    obs = tuple(observed) if observed is not None else names
    if isinstance(observed, str):
        obs = (observed,)
    for o in obs:
        if o not in names:
            raise UsageError(f"observed={o!r} is not an observable of {template.name!r}; it has {', '.join(names)}")
    if not obs:
        raise UsageError("observed= names no observable; give at least one")
    accepted = tuple(template.doses)
    rts = tuple(accepted if routes is None else ([routes] if isinstance(routes, str) else routes))
    for r in rts:
        if r not in accepted:
            raise UsageError(f"routes={r!r}: template {template.name!r} has no {r!r} dose input; it accepts "
                             f"{', '.join(accepted) or 'no doses'}")
    params = template.parameter_names
    kn = tuple(p.name for p in template.parameters if p.fixed) if known is None else tuple(
        [known] if isinstance(known, str) else known)
    for k in kn:
        if k not in params:
            raise UsageError(f"known={k!r} is not a parameter of {template.name!r}; it has {', '.join(params)}")
    lag_names = {template.doses[r].lag for r in rts if template.doses[r].lag}
    lags = tuple(p for p in params if p in lag_names and p not in kn)
    unknown = tuple(p for p in params if p not in kn and p not in lag_names)
    occasions = tuple(Occasion(r, sp.Rational(rng.randint(200, 900), 101)) for r in rts) or (Occasion(None),)
    values = _random_point(template, params, rng)
    known_values = {k: values[k] for k in kn if k not in lag_names}
    return _Setup(template, obs, rts, kn, unknown, lags, occasions,
                  {k: values[k] for k in unknown}, known_values, seed)


def _at_rest(template: Template) -> bool:
    """All initial states 0 and the right-hand side 0 there (nothing moves before a dose)."""
    if any(sp.sympify(s.initial) != 0 for s in template.states):
        return False
    states = set(template.state_names)
    for n in states:
        f = sp.sympify(template.equations[n])
        if sp.simplify(f.xreplace({q: 0 for q in f.free_symbols if q.name in states})) != 0:
            return False
    return True


def identifiability(
    template: Template,
    observed: Sequence[str] | None = None,
    *,
    routes: Sequence[str] | None = None,
    known: Sequence[str] | None = None,
    timeout: float = TIMEOUT,
    seed: int = 0,
) -> IdentifiabilityResult:
    """Structural (a priori) identifiability of the template's parameters.

    The method (Taylor series; local by an exact rank test, global by solving the
    coefficient equations) is described at the top of this module.

    Parameters
    ----------
    template : Template
    observed : sequence of str, optional
        Observable names that are measured (default: all).
    routes : sequence of str, optional
        Dose routes used, each a separate occasion (default: every route the template
        accepts; none for a template without dose inputs).
    known : sequence of str, optional
        Parameters held fixed (known). Default: those the template holds fixed.
    timeout : float, s
        Time bound for the whole answer.
    seed : int
        Seed of the random point (the same seed gives the same answer).

    Returns
    -------
    IdentifiabilityResult

    Examples
    --------
    >>> from compartments import load_template
    >>> r = identifiability(load_template("one-comp-oral"))
    >>> r.status["ka"], r.solutions       # the flip-flop pair
    ('local', 2)
    >>> r = identifiability(load_template("predator-prey"), observed=["prey"])
    >>> r.status["beta"], [str(c) for c in r.combinations]
    ('none', ['beta*predator0'])
    """
    if not (isinstance(timeout, (int, float)) and timeout > 0):
        raise UsageError(f"timeout={timeout!r} must be a positive number of seconds")
    started = time.monotonic()
    s = _setup(template, observed, routes, known, seed)
    status: dict[str, str] = {p: "undecided" for p in template.parameter_names if p not in s.known}
    why: dict[str, str] = {}
    notes: list[str] = []
    if s.lags:
        for lag in s.lags:
            if _at_rest(template):
                status[lag] = "global"
                why[lag] = "fixed by the time the response starts (the system is at rest before the dose)"
            else:
                why[lag] = "a lag time in a system that moves before the dose is outside this method"
    base = dict(template=template.name, observed=s.observed, routes=s.routes, known=s.known,
                point={k: float(v) for k, v in s.point.items()})
    if not s.unknown:
        return IdentifiabilityResult(status=status, why=why, seconds=time.monotonic() - started, **base)
    deadline = started + timeout
    try:
        with _time_limit(max(deadline - time.monotonic(), 1e-3)):
            out = _analyse(s, status, why, notes, deadline)
    except _OutOfTime:
        out = {}
        for p in s.unknown:
            if status[p] == "undecided" and p not in why:
                why[p] = f"not decided within the time bound of {timeout:g} s"
    except _Undecided as exc:
        out = {}
        for p in s.unknown:
            if status[p] == "undecided" and p not in why:
                why[p] = str(exc)
    except NotRational as exc:
        out = {}
        for p in s.unknown:
            why[p] = str(exc)
    return IdentifiabilityResult(status=status, why=why, notes=tuple(notes),
                                 seconds=time.monotonic() - started, **base, **out)


def _check_time(deadline: float) -> None:
    if time.monotonic() > deadline:
        raise _OutOfTime


def _analyse(s: _Setup, status: dict[str, str], why: dict[str, str], notes: list[str],
             deadline: float) -> dict[str, Any]:
    """Rank test, combinations and the global step; fills ``status`` and ``why``."""
    t = s.template
    K = len(t.states) + len(s.unknown)
    jets = build_jets(t, s.observed, s.occasions, s.unknown, s.known_values, K)
    J = jets.jacobian(_symbols(jets, s.point))
    rank = _rank(J)
    p = len(s.unknown)
    local = [i for i in range(p) if _rank(J[:, [j for j in range(p) if j != i]]) < rank]
    for i, name in enumerate(s.unknown):
        if i not in local:
            status[name] = "none"
            why[name] = "the output does not fix it, even locally (rank test)"
    out: dict[str, Any] = {"order": K}
    _check_time(deadline)
    if rank < p:
        out["combinations"] = _combinations(s, jets, J, local, deadline)
    if not local:
        return out
    hold = _held(J, local, rank)
    out.update(_global(s, local, hold, J, deadline, status, why, notes))
    return out


def _symbols(jets: JetSystem, point: Mapping[str, sp.Rational]) -> dict[str, Any]:
    """The point in the jet ring's number type (exact rationals)."""
    QQ = jets.ring.domain
    return {q: QQ(int(point[q].p), int(point[q].q)) for q in jets.parameters}


def _held(J: sp.Matrix, local: Sequence[int], rank: int) -> list[int]:
    """Non-identifiable columns to hold fixed so that the rest has full rank ``rank``."""
    p = J.cols
    keep = list(range(p))
    for j in reversed(range(p)):
        if j in local or len(keep) == rank:
            continue
        trial = [c for c in keep if c != j]
        if _rank(J[:, trial]) == rank:
            keep = trial
    return [j for j in range(p) if j not in keep]


# ------------------------------------------------------------------ combinations
def _combinations(s: _Setup, jets: JetSystem, J: sp.Matrix, local: Sequence[int],
                  deadline: float) -> tuple[sp.Expr, ...]:
    """Simple functions of the non-identifiable parameters whose gradients lie in the row
    space of the Jacobian at the point and at a second random point."""
    names = s.unknown
    free = [i for i in range(len(names)) if i not in local]
    symbols = [sp.Symbol(n, real=True) for n in names]
    second = _random_point(s.template, names, random.Random(s.seed + 1))
    J2 = jets.jacobian(_symbols(jets, second))
    points = [(J, s.point), (J2, second)]
    target = _rank(J)
    basis_rows = [sp.Matrix([[int(j == i) for j in range(len(names))]]) for i in local]
    chosen: list[sp.Expr] = []
    for candidate in _candidates([symbols[i] for i in free]):
        _check_time(deadline)
        if len(local) + len(chosen) >= target:
            break
        ok = True
        for Jp, pt in points:
            grad = sp.Matrix([[sp.diff(candidate, q).xreplace(
                {sp.Symbol(n, real=True): pt[n] for n in names}) for q in symbols]])
            if _rank(Jp.col_join(grad)) != _rank(Jp):
                ok = False
                break
        if not ok:
            continue
        grads = sp.Matrix.vstack(*(basis_rows + [
            sp.Matrix([[sp.diff(c, q).xreplace({sp.Symbol(n, real=True): s.point[n] for n in names})
                        for q in symbols]]) for c in chosen + [candidate]]))
        if _rank(grads) == len(basis_rows) + len(chosen) + 1:
            chosen.append(candidate)
    return tuple(chosen)


def _candidates(free: Sequence[sp.Symbol]) -> Iterator[sp.Expr]:
    """Products of powers ±1 (fewest factors first), then sums, of the free parameters."""
    for size in range(1, len(free) + 1):
        for subset in itertools.combinations(free, size):
            for signs in itertools.product((1, -1), repeat=size):
                if signs[0] < 0:
                    continue  # the reciprocal of a candidate carries the same information
                yield sp.Mul(*(q**e for q, e in zip(subset, signs, strict=True)))
    for size in range(2, len(free) + 1):
        for subset in itertools.combinations(free, size):
            yield sp.Add(*subset)


# ------------------------------------------------------------------ global step
def _global(s: _Setup, local: Sequence[int], hold: Sequence[int], J: sp.Matrix, deadline: float,
            status: dict[str, str], why: dict[str, str], notes: list[str]) -> dict[str, Any]:
    names = s.unknown
    solve_for = [names[i] for i in range(len(names)) if i not in hold]
    fixed = dict(s.known_values) | {names[i]: s.point[names[i]] for i in hold}
    if hold:
        notes.append("held at the checked point to leave finitely many solutions: "
                     + ", ".join(names[i] for i in hold))
    cols = [names.index(n) for n in solve_for]
    target = _rank(J[:, cols])
    n_obs = len(s.observed) * len(s.occasions)
    order = next(k for k in range(J.rows // n_obs) if _rank(J[: n_obs * (k + 1), cols]) == target)
    top = len(s.template.states) + len(names)
    solutions = None
    for k in range(order, top + 1):
        _check_time(deadline)
        jets = build_jets(s.template, s.observed, s.occasions, solve_for, fixed, k)
        found = _solve(s, jets)
        if found is not None:
            solutions = found
            break
    if solutions is None:
        for n in solve_for:
            if status[n] == "undecided":
                why[n] = ("locally identifiable (rank test); the coefficient equations did not leave"
                          " finitely many solutions up to order " + str(top))
        return {}
    last = max(top, 2 * len(s.template.states)) + 2
    check = build_jets(s.template, s.observed, s.occasions, solve_for, fixed, last)
    target_out = check.output_values(check.evaluate(_symbols(check, s.point)))
    kept = [sol for sol in solutions if _same_output(check, sol, target_out)]
    if not any(_close(sol, {n: s.point[n] for n in solve_for}) for sol in kept):
        raise _Undecided("the solutions of the coefficient equations lost the checked point to rounding")
    for n in solve_for:
        if names.index(n) not in local:
            continue
        values = {complex(sol[n]) for sol in kept}
        distinct = _distinct(values)
        status[n] = "global" if distinct == 1 else "local"
        if distinct > 1:
            why[n] = f"{distinct} values give the same output"
    admissible = [sol for sol in kept if _admissible(s.template, sol)]
    point = {n: s.point[n] for n in solve_for}
    others = tuple({n: float(complex(sol[n]).real) for n in solve_for}
                   for sol in admissible if not _close(sol, point))
    return {"solutions": len(kept), "admissible": len(admissible), "alternatives": others,
            "order": last}


def _solve(s: _Setup, jets: JetSystem) -> list[dict[str, sp.Expr]] | None:
    """All solutions of the coefficient equations for the unknown parameters, or None when
    the solution set is not finite (the caller then adds orders)."""
    values = jets.evaluate(_symbols(jets, s.point))
    R = jets.ring
    outputs = [(R.gens[y], values[y]) for row in jets.outputs for y in row]
    eqs = [eq.expr.subs(outputs).as_expr() for eq in jets.equations]
    eqs = [e for e in eqs if e != 0]
    theta = [sp.Symbol(q, real=True) for q in jets.parameters]
    variables = set().union(*(e.free_symbols for e in eqs)) if eqs else set()
    jet_vars = sorted(variables - set(theta), key=str)
    if len(jet_vars) + len(theta) > MAX_UNKNOWNS:
        raise _Undecided(f"the coefficient equations have {len(jet_vars) + len(theta)} unknowns;"
                         f" more than {MAX_UNKNOWNS} are not solved")
    w = sp.Symbol("_w")
    positive = [q for q in theta if s.template.parameter(q.name).lower > 0]
    nonzero = [p.subs(outputs).as_expr() for p in jets.nonzero]
    eqs.append(sp.expand(w * sp.Mul(*positive) * sp.Mul(*nonzero) - 1))
    G = sp.groebner(eqs, w, *jet_vars, *theta, order="grevlex")
    if list(G.exprs) == [1]:
        raise _Undecided("the coefficient equations came out inconsistent at the checked point")
    if not G.is_zero_dimensional:
        return None
    lex = G.fglm("lex")
    part = [sp.Poly(g, *theta) for g in lex.exprs if g.free_symbols <= set(theta)]
    return [{q.name: v for q, v in zip(theta, sol, strict=True)} for sol in _back_substitute(part, theta)]


def _back_substitute(part: Sequence[sp.Poly], theta: Sequence[sp.Symbol]) -> list[list[Any]]:
    """All (complex) zeros of a zero-dimensional lex Gröbner basis in ``theta``, by solving
    for the last variable first and substituting (50-digit roots; every polynomial is
    checked at every partial solution)."""
    partial: list[list[Any]] = [[]]
    with mpmath.workdps(_DIGITS):
        for depth in range(len(theta) - 1, -1, -1):
            here = [g for g in part if all(d == 0 for d in g.degree_list()[:depth])]
            grown: list[list[Any]] = []
            for known_tail in partial:
                polys = [_univariate(g, depth, known_tail) for g in here]
                polys = [c for c in polys if any(abs(x) > _TINY for x in c)]
                usable = [c for c in polys if len(c) > 1 and abs(c[0]) > _TINY]
                if not usable:
                    raise _Undecided("the coefficient equations could not be solved for "
                                     + str(theta[depth]))
                lead = min(usable, key=len)
                for root in mpmath.polyroots(lead, maxsteps=400, extraprec=200):
                    if all(abs(mpmath.polyval(c, root)) <= _TOL * max(1, *(abs(x) for x in c))
                           for c in polys):
                        grown.append([root] + known_tail)
            partial = _unique(grown)
    return partial


_TINY = mpmath.mpf(10) ** -40
_TOL = mpmath.mpf(10) ** -20


def _univariate(g: sp.Poly, depth: int, tail: Sequence[Any]) -> list[Any]:
    """Coefficients (highest first) of ``g`` in variable ``depth`` after the later variables
    take the values ``tail``."""
    degree = g.degree_list()[depth]
    coeffs = [mpmath.mpc(0)] * (degree + 1)
    for monom, c in g.terms():
        term = mpmath.mpf(int(c.p)) / int(c.q)
        for v, e in zip(tail, monom[depth + 1:], strict=True):
            if e:
                term *= v**e
        coeffs[degree - monom[depth]] += term
    return coeffs


def _unique(points: list[list[Any]]) -> list[list[Any]]:
    kept: list[list[Any]] = []
    for p in points:
        if not any(all(abs(a - b) <= mpmath.mpf(10) ** -15 * max(1, abs(b)) for a, b in zip(p, q, strict=True))
                   for q in kept):
            kept.append(p)
    return kept


def _mp(value: Any) -> Any:
    """A sympy number (exact, algebraic or float) as a 50-digit mpmath number."""
    if isinstance(value, (mpmath.mpf, mpmath.mpc)):
        return mpmath.mpc(value)
    re, im = sp.N(value, _DIGITS).as_real_imag()
    return mpmath.mpc(mpmath.mpf(str(re)), mpmath.mpf(str(im)))


def _same_output(check: JetSystem, sol: Mapping[str, sp.Expr], target: Sequence[Any]) -> bool:
    """The solution's output coefficients equal ``target`` (exact) to 30 digits."""
    with mpmath.workdps(_DIGITS):
        point = {q: _mp(sol[q]) for q in check.parameters}
        try:
            got = check.output_values(check.evaluate(point, _mp_coefficient))
        except ZeroDivisionError:
            return False
        for a, b in zip(got, target, strict=True):
            b = _mp_coefficient(b)
            if abs(a - b) > mpmath.mpf(10) ** -30 * max(1, abs(b)):
                return False
    return True


def _mp_coefficient(c: Any) -> Any:
    return mpmath.mpf(int(c.numerator)) / int(c.denominator)


def _close(sol: Mapping[str, sp.Expr], point: Mapping[str, sp.Expr]) -> bool:
    return all(abs(complex(sol[n]) - float(point[n])) <= 1e-12 * max(1.0, abs(float(point[n])))
               for n in point)


def _distinct(values: set[complex]) -> int:
    kept: list[complex] = []
    for v in values:
        if not any(abs(v - u) <= 1e-12 * max(1.0, abs(u)) for u in kept):
            kept.append(v)
    return len(kept)


def _admissible(template: Template, sol: Mapping[str, sp.Expr]) -> bool:
    for n, v in sol.items():
        z = complex(v)
        if abs(z.imag) > 1e-12 * max(1.0, abs(z)):
            return False
        p = template.parameter(n)
        if p.lower > 0 and z.real <= 0 or p.lower >= 0 and z.real < 0:
            return False
    return True
