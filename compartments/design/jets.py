"""Taylor-series coefficients ("jets") of a template's outputs at the start of a dose occasion.

The outputs of an analytic model are fixed by their Taylor series at ``t = 0+``
(Pohjanpalo 1978, Math Biosci 41:21). Instead of expanding the coefficients as
expressions of the parameters (they swell quickly), every derivative is kept as an
unknown of its own, as in the differential-algebra approach of Hong, Ovchinnikov,
Pogudin & Yap (2019, Bioinformatics 35:2873):

* ``x{e}_{i}_{k}`` is the k-th time derivative of state i at the start of occasion e;
* ``y{e}_{o}_{k}`` that of observable o.

A right-hand side ``f_i = P_i/Q_i`` (a rational function of states and parameters) gives
the identity ``Q_i·x_i' − P_i = 0``; its k-th total time derivative is a polynomial
equation that is linear in ``x_i^(k+1)`` (with coefficient ``Q_i`` at the start).
Outputs ``g_o = S_o/R_o`` give ``R_o·y_o − S_o = 0`` the same way. A bolus is an initial
condition of the state it enters (``x(0+) = x0 + F·D``; an oral dose enters the depot),
an infusion a constant input ``F·R`` into its state; the amount ``D`` and rate ``R`` are
known numbers. The equations are ordered so that each fixes one new unknown (its
*lead*): evaluating the jets at a point, and their derivatives with respect to the
parameters, is a forward sweep, exact in rational arithmetic. The polynomials live in a
sparse polynomial ring over the rationals (:mod:`sympy.polys.rings`).

Numerics only: no I/O and no presentation.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import sympy as sp
from sympy.polys.rings import PolyElement, PolyRing, ring

from ..template import Template

__all__ = ["JetEquation", "JetSystem", "NotRational", "Occasion", "build_jets"]


class NotRational(ValueError):
    """The model uses functions (exp, log, sqrt, abs, min, max, piecewise) that the exact
    method cannot take: it needs rational right-hand sides and outputs."""


@dataclass(frozen=True)
class Occasion:
    """One dose occasion: where a known dose enters (``route`` None: no dose)."""

    route: str | None
    amount: sp.Rational = sp.Integer(1)


class _Sparse:
    """A polynomial as ``[(coefficient, ((gen, exponent), ...)), ...]`` for fast evaluation."""

    __slots__ = ("terms",)

    def __init__(self, p: PolyElement) -> None:
        self.terms = [(c, tuple((i, e) for i, e in enumerate(m) if e)) for m, c in p.items()]

    def __call__(self, values: Sequence[Any], convert: Callable[[Any], Any]) -> Any:
        total = convert(0)
        for c, factors in self.terms:
            term = convert(c)
            for i, e in factors:
                v = values[i]
                term = term * (v if e == 1 else v**e)
            total = total + term
        return total


@dataclass
class JetEquation:
    """``coefficient·lead + rest = 0``, polynomial in jets and parameters."""

    lead: int  # index of the generator it fixes
    coefficient: PolyElement
    rest: PolyElement
    _coef: _Sparse = field(init=False, repr=False)
    _rest: _Sparse = field(init=False, repr=False)
    _partials: list[tuple[int, _Sparse]] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        self._coef = _Sparse(self.coefficient)
        self._rest = _Sparse(self.rest)
        expr = self.expr
        ring_ = expr.ring
        used = sorted({i for m in expr.monoms() for i, e in enumerate(m) if e} - {self.lead})
        self._partials = [(i, _Sparse(expr.diff(ring_.gens[i]))) for i in used]

    @property
    def expr(self) -> PolyElement:
        lead = self.coefficient.ring.gens[self.lead]
        return self.coefficient * lead + self.rest


def _exact(c: Any) -> Any:
    return c


@dataclass
class JetSystem:
    """The jet equations of a template for the given occasions (one per dose route).

    Attributes
    ----------
    ring : PolyRing
        Generators: the unknown parameters first, then the jets.
    parameters : tuple of str
        The unknown (estimated) parameters, in template order.
    equations : list of JetEquation
        In evaluation order (each lead is fixed by earlier leads and the parameters).
    outputs : list of list of int
        ``outputs[k]``: generator indices of the output jets of order k (all occasions
        and observables).
    nonzero : list of PolyElement
        Denominators that must not vanish (right-hand sides and outputs at the start,
        initial values).
    order : int
        Highest output order K.
    """

    ring: PolyRing
    parameters: tuple[str, ...]
    equations: list[JetEquation]
    outputs: list[list[int]]
    nonzero: list[PolyElement]
    order: int

    def evaluate(self, point: Mapping[str, Any], convert: Callable[[Any], Any] = _exact) -> list[Any]:
        """Every generator's value at the parameter values ``point``.

        ``convert`` turns the ring's rational coefficients into the number type of the
        values (identity for exact rationals; e.g. ``mpmath.mpf`` for 50-digit floats).
        """
        values: list[Any] = [None] * self.ring.ngens
        for i, name in enumerate(self.parameters):
            values[i] = point[name]
        for eq in self.equations:
            a = eq._coef(values, convert)
            if a == 0:
                raise ZeroDivisionError(f"{self.ring.symbols[eq.lead]} is not determined at this point")
            values[eq.lead] = -eq._rest(values, convert) / a
        return values

    def output_values(self, values: Sequence[Any], order: int | None = None) -> list[Any]:
        """Output jets of orders 0..order, flattened by order."""
        top = self.order if order is None else order
        return [values[y] for k in range(top + 1) for y in self.outputs[k]]

    def jacobian(self, point: Mapping[str, Any]) -> sp.Matrix:
        """Exact derivatives of the output jets (rows, by order) with respect to the unknown
        parameters (columns), by implicit differentiation of the triangular system."""
        values = self.evaluate(point)
        p = len(self.parameters)
        zero = self.ring.domain.zero
        grad: dict[int, list[Any]] = {i: [self.ring.domain.one if j == i else zero for j in range(p)]
                                      for i in range(p)}
        for eq in self.equations:
            a = eq._coef(values, _exact)
            g = [zero] * p
            for i, partial in eq._partials:
                dv = partial(values, _exact)
                if dv:
                    g = [gi + dv * gv for gi, gv in zip(g, grad[i], strict=True)]
            grad[eq.lead] = [-gi / a for gi in g]
        rows = [grad[y] for k in range(self.order + 1) for y in self.outputs[k]]
        return sp.Matrix([[sp.Rational(int(v.numerator), int(v.denominator)) for v in row] for row in rows])


def _fraction(expr: sp.Expr, symbols: Sequence[sp.Symbol], what: str) -> tuple[sp.Expr, sp.Expr]:
    if not expr.is_rational_function(*symbols):
        raise NotRational(
            f"{what} uses a function other than +, -, *, / and whole powers; the exact"
            " Taylor-series method needs rational functions"
        )
    num, den = sp.fraction(sp.together(expr))
    return sp.expand(num), sp.expand(den)


def _total_derivative(p: PolyElement, nxt: Mapping[int, int]) -> PolyElement:
    """d/dt of a polynomial in jets (parameters and inputs are constant)."""
    gens = p.ring.gens
    out = p.ring.zero
    for i in {i for m in p.monoms() for i, e in enumerate(m) if e}:
        if i in nxt:
            out += p.diff(gens[i]) * gens[nxt[i]]
    return out


def build_jets(
    template: Template,
    observed: Sequence[str],
    occasions: Sequence[Occasion],
    unknown: Sequence[str],
    known: Mapping[str, sp.Rational],
    order: int,
) -> JetSystem:
    """Jet equations of ``template`` up to output order ``order``.

    Parameters
    ----------
    template : Template
    observed : sequence of str
        Observable names.
    occasions : sequence of Occasion
        One per dose route used (each starts from the template's initial state).
    unknown : sequence of str
        Parameters to identify.
    known : mapping of str to Rational
        Values of the other parameters (lag times are left out by the caller).
    order : int
        Highest output derivative.

    Raises
    ------
    NotRational
        The model is not rational in its states and parameters.
    """
    b = _Builder(template, observed, len(occasions), unknown, known, order)
    for e, occ in enumerate(occasions):
        state_eqs, out_eqs = b.start(e, occ)
        b.sweep(e, state_eqs, out_eqs)
    return JetSystem(ring=b.R, parameters=tuple(unknown), equations=b.equations, outputs=b.outputs,
                     nonzero=b.nonzero, order=order)


class _Builder:
    """The ring of parameters and jets, and the equations as they are built."""

    def __init__(self, template: Template, observed: Sequence[str], occasions: int, unknown: Sequence[str],
                 known: Mapping[str, sp.Rational], order: int) -> None:
        self.template, self.order = template, order
        self.xs = [sp.Symbol(n, real=True) for n in template.state_names]
        ps = {p.name: sp.Symbol(p.name, real=True) for p in template.parameters}
        self.by_name = {s.name: s for s in self.xs} | ps
        self.syms = self.xs + list(ps.values())
        self.fixed = {ps[k]: sp.Rational(v) for k, v in known.items()}
        self.n, self.m = len(self.xs), len(observed)
        names = [f"x{e}_{i}_{k}" for e in range(occasions) for i in range(self.n) for k in range(order + 1)]
        names += [f"y{e}_{o}_{k}" for e in range(occasions) for o in range(self.m) for k in range(order + 1)]
        self.R = ring([ps[u] for u in unknown] + [sp.Symbol(s) for s in names], sp.QQ, "grevlex")[0]
        self.index = {str(s): i for i, s in enumerate(self.R.symbols)}
        self.rhs = [_fraction(self.norm(template.equations[s]), self.syms, f"the equation of {s}")
                    for s in template.state_names]
        self.outs = [_fraction(self.norm(template.observable(o).expression), self.syms, f"observable {o}")
                     for o in observed]
        self.equations: list[JetEquation] = []
        self.outputs: list[list[int]] = [[] for _ in range(order + 1)]
        self.nonzero: list[PolyElement] = []

    def norm(self, e: Any) -> sp.Expr:
        """Template symbols as the ring's, known parameters as their values."""
        e = sp.sympify(e)
        e = e.xreplace({s: self.by_name[s.name] for s in e.free_symbols if s.name in self.by_name})
        return e.xreplace(self.fixed)

    def X(self, e: int, i: int, k: int) -> int:
        return self.index[f"x{e}_{i}_{k}"]

    def Y(self, e: int, o: int, k: int) -> int:
        return self.index[f"y{e}_{o}_{k}"]

    def _ring(self, expr: sp.Expr, e: int) -> PolyElement:
        start = {self.xs[i]: self.R.symbols[self.X(e, i, 0)] for i in range(self.n)}
        return self.R.from_expr(expr.xreplace(start))

    def _add(self, lead: int, p: PolyElement) -> None:
        coef = _lead_coefficient(p, lead)
        self.equations.append(JetEquation(lead, coef, p - coef * self.R.gens[lead]))

    def _nonzero(self, p: PolyElement) -> PolyElement:
        if not p.is_ground:
            self.nonzero.append(p)
        return p

    def start(self, e: int, occ: Occasion) -> tuple[list[PolyElement], list[PolyElement]]:
        """Initial values of occasion e; its first state and output identities."""
        t, n = self.template, self.n
        inputs = [sp.Integer(0)] * n
        init = [self.norm(s.initial) for s in t.states]
        if occ.route is not None:
            entry = t.doses[occ.route]
            j = t.state_names.index(entry.state)
            F = self.norm(entry.bioavailability)
            if occ.route == "infusion":
                inputs[j] = occ.amount * F  # a constant input
            else:
                init[j] = init[j] + occ.amount * F  # a bolus: an initial condition
        for i in range(n):
            num, den = _fraction(init[i], self.syms, f"the initial value of {t.state_names[i]}")
            c = self._nonzero(self._ring(den, e))
            self.equations.append(JetEquation(self.X(e, i, 0), c, -self._ring(num, e)))
        gens = self.R.gens
        state_eqs = []
        for i, (P, Q) in enumerate(self.rhs):
            Qi = self._nonzero(self._ring(Q, e))
            if self.order >= 1:
                state_eqs.append(Qi * gens[self.X(e, i, 1)] - self._ring(sp.expand(P + inputs[i] * Q), e))
        out_eqs = [self._nonzero(self._ring(Rr, e)) * gens[self.Y(e, o, 0)] - self._ring(S, e)
                   for o, (S, Rr) in enumerate(self.outs)]
        return state_eqs, out_eqs

    def sweep(self, e: int, state_eqs: list[PolyElement], out_eqs: list[PolyElement]) -> None:
        """Differentiate the identities order by order, each fixing its new jet."""
        order = self.order
        nxt = {self.X(e, i, k): self.X(e, i, k + 1) for i in range(self.n) for k in range(order)}
        nxt |= {self.Y(e, o, k): self.Y(e, o, k + 1) for o in range(self.m) for k in range(order)}
        for k in range(order + 1):
            for o in range(self.m):
                self._add(self.Y(e, o, k), out_eqs[o])
                self.outputs[k].append(self.Y(e, o, k))
                if k < order:
                    out_eqs[o] = _total_derivative(out_eqs[o], nxt)
            if k == order:
                break
            for i in range(self.n):
                self._add(self.X(e, i, k + 1), state_eqs[i])
                if k + 1 < order:
                    state_eqs[i] = _total_derivative(state_eqs[i], nxt)


def _lead_coefficient(p: PolyElement, lead: int) -> PolyElement:
    """The coefficient of generator ``lead`` in ``p`` (which is linear in it)."""
    R = p.ring
    out = R.zero
    for monom, c in p.items():
        e = monom[lead]
        if e == 1:
            reduced = list(monom)
            reduced[lead] = 0
            out += R({tuple(reduced): c})
        elif e > 1:  # pragma: no cover - the construction keeps every equation linear in its lead
            raise AssertionError("jet equation not linear in its lead")
    return out
