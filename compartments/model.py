"""Compile a :class:`~compartments.template.Template` into fast numpy callables.

The right-hand side ``f(x, θ)``, its Jacobians with respect to the states (``fx``) and the
parameters (``fp``), the observables ``g(x, θ)`` with their derivatives, the initial
conditions and each route's bioavailability are generated once with sympy (common
subexpressions eliminated) and lambdified to numpy. A model whose right-hand side is
affine in the states (``f = A(θ) x + b(θ)``) is flagged linear, and its ``A`` and ``b`` with
their parameter derivatives are compiled too, for the matrix-exponential solver.

Examples
--------
>>> from compartments import load_template
>>> m = compile_model(load_template("one-comp-iv"))
>>> m.is_linear
True
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
import sympy as sp
from numpy.typing import NDArray

from .errors import UsageError
from .template import Template

Array = NDArray[np.float64]


def _lambdify_matrix(args: Sequence[sp.Symbol], rows: list[list[sp.Expr]]) -> Callable[..., Array]:
    """Lambdify a matrix of expressions to a function returning a float array.

    Works for scalar arguments (fast path used inside integrators) and broadcasts for
    array arguments (entries that are constants are expanded to the common shape).
    """
    nr = len(rows)
    nc = len(rows[0]) if nr else 0
    flat = [e for row in rows for e in row]
    if not flat:
        return lambda *a: np.zeros((nr, nc))
    fn = sp.lambdify(args, flat, modules="numpy", cse=True)

    def call(*a: Any) -> Array:
        vals = fn(*a)
        try:
            out = np.array(vals, dtype=float)
        except ValueError:  # ragged: some entries are constants, others arrays
            shape = np.broadcast_shapes(*(np.shape(v) for v in vals))
            out = np.array([np.broadcast_to(np.asarray(v, dtype=float), shape) for v in vals])
        return out.reshape((nr, nc) + out.shape[1:])

    return call


@dataclass(frozen=True)
class RouteInput:
    """Compiled dose input of one route."""

    route: str
    state_index: int
    bioavailability: Callable[..., Array]  # θ -> (1, 1)
    bioavailability_grad: Callable[..., Array]  # θ -> (1, p)
    lag_index: int | None


@dataclass(frozen=True, eq=False)
class Model:
    """A template compiled to numpy callables.

    All callables take the states and parameters unpacked: ``f(*x, *theta)``; use the
    convenience methods :meth:`rhs`, :meth:`observe` and friends rather than calling them
    directly.
    """

    template: Template
    state_names: tuple[str, ...]
    parameter_names: tuple[str, ...]
    observable_names: tuple[str, ...]
    is_linear: bool
    _f: Callable[..., Array]
    _fx: Callable[..., Array]
    _fp: Callable[..., Array]
    _g: Callable[..., Array]
    _gx: Callable[..., Array]
    _gp: Callable[..., Array]
    _x0: Callable[..., Array]
    _x0p: Callable[..., Array]
    _A: Callable[..., Array] | None
    _Ap: Callable[..., Array] | None
    _b: Callable[..., Array] | None
    _bp: Callable[..., Array] | None
    routes: Mapping[str, RouteInput] = field(default_factory=dict)
    _flat: Callable[..., Any] | None = None  # f as a flat list, (x, θ) unpacked
    _aug: Callable[..., Any] | None = None  # [f; f_x S + f_θ] flat, (x, S param-major, θ) unpacked

    @property
    def n_states(self) -> int:
        return len(self.state_names)

    @property
    def n_params(self) -> int:
        return len(self.parameter_names)

    @cached_property
    def defaults(self) -> Array:
        """Template default values in parameter order."""
        return np.array([p.default for p in self.template.parameters], dtype=float)

    def param_vector(self, params: Mapping[str, float] | Sequence[float] | Array | None) -> Array:
        """Full parameter vector from a (partial) mapping, filling template defaults."""
        theta = self.defaults.copy()
        if params is None:
            return theta
        if isinstance(params, Mapping):
            for k, v in params.items():
                if k not in self.parameter_names:
                    raise UsageError(
                        f"parameter {k!r} is not in template {self.template.name!r}; "
                        f"it has {', '.join(self.parameter_names)}"
                    )
                i = self.parameter_names.index(k)
                theta[i] = _checked_value(self.template.parameters[i], v, self.template.name)
            return theta
        arr = np.asarray(params, dtype=float)
        if arr.shape != (self.n_params,):
            raise UsageError(
                f"expected {self.n_params} parameter values ({', '.join(self.parameter_names)}), got {arr.shape}"
            )
        return arr.copy()

    # -- evaluation helpers (x: (n,) or (n, T); theta: (p,)) ---------------------------
    def rhs(self, x: Array, theta: Array) -> Array:
        return self._f(*x, *theta).reshape(-1)

    def rhs_point(self, theta: Array, sensitivities: bool) -> Callable[[Array], Array]:
        """``z -> f`` (or ``[f; f_x S + f_θ]`` with S stored parameter-major in ``z[n:]``) at
        fixed ``theta``, as one generated call: the integrator's inner loop. The generated
        code runs on Python floats, about twice as fast as on NumPy scalars for these small
        expressions (benchmarks/ode_driver.py)."""
        fn = self._aug if sensitivities else self._flat
        assert fn is not None
        th = [float(v) for v in theta]

        def f(z: Array) -> Array:
            return np.array(fn(*z.tolist(), *th), dtype=float)

        return f

    def jac_states(self, x: Array, theta: Array) -> Array:
        return self._fx(*x, *theta)

    def jac_params(self, x: Array, theta: Array) -> Array:
        return self._fp(*x, *theta)

    def observe(self, x: Array, theta: Array) -> Array:
        """Observables, shape (m,) for x (n,) or (m, T) for x (n, T)."""
        out = self._g(*x, *theta)
        return out.reshape((len(self.observable_names),) + np.shape(x)[1:])

    def observe_jac_states(self, x: Array, theta: Array) -> Array:
        return self._gx(*x, *theta)

    def observe_jac_params(self, x: Array, theta: Array) -> Array:
        return self._gp(*x, *theta)

    def initial(self, theta: Array) -> Array:
        return self._x0(*theta).reshape(-1)

    def initial_jac(self, theta: Array) -> Array:
        return self._x0p(*theta)

    def linear_parts(self, theta: Array) -> tuple[Array, Array, Array, Array]:
        """``A`` (n,n), ``b`` (n,), ``dA/dθ`` (p,n,n), ``db/dθ`` (n,p) of a linear model."""
        if not self.is_linear:
            raise UsageError(f"template {self.template.name!r} is not linear in its states")
        assert self._A is not None and self._Ap is not None and self._b is not None and self._bp is not None
        A = self._A(*theta)
        b = self._b(*theta).reshape(-1)
        Ap = self._Ap(*theta).reshape(self.n_params, self.n_states, self.n_states)
        bp = self._bp(*theta)
        return A, b, Ap, bp

    def simulate(self, params: Any, doses: Sequence[Any], times: Any, *, sensitivities: bool = False,
                 method: str = "auto", rtol: float = 1e-8, atol: float | None = None) -> Any:
        """Simulate states and observables at ``times``; see :func:`compartments.simulate.simulate`."""
        from .simulate import simulate

        return simulate(self, params, doses, times, sensitivities=sensitivities, method=method,
                        rtol=rtol, atol=atol)


def compile_model(template: Template) -> Model:
    """Compile a template (sympy) into numpy callables; see :class:`Model`."""
    xs = [sp.Symbol(n, real=True) for n in template.state_names]
    ps = [sp.Symbol(n, real=True) for n in template.parameter_names]
    # Templates may have built their expressions with plain or real symbols; map both.
    by_name = {s.name: s for s in xs + ps}

    def norm(e: sp.Expr) -> sp.Expr:
        e = sp.sympify(e) if not isinstance(e, sp.Basic) else e  # numbers only, never user text
        return e.xreplace({s: by_name[s.name] for s in e.free_symbols if s.name in by_name})

    f = [norm(template.equations[n]) for n in template.state_names]
    args = xs + ps
    fx = [[sp.diff(fi, xj) for xj in xs] for fi in f]
    fp = [[sp.diff(fi, pj) for pj in ps] for fi in f]
    g = [norm(o.expression) for o in template.observables]
    gx = [[sp.diff(gi, xj) for xj in xs] for gi in g]
    gp = [[sp.diff(gi, pj) for pj in ps] for gi in g]
    x0 = [norm(s.initial) for s in template.states]
    x0p = [[sp.diff(xi, pj) for pj in ps] for xi in x0]

    state_set = set(xs)
    is_linear = all(not (e.free_symbols & state_set) for row in fx for e in row)
    A_fn = Ap_fn = b_fn = bp_fn = None
    if is_linear:
        A = fx
        zero = {x: 0 for x in xs}
        b = [fi.subs(zero) for fi in f]
        A_fn = _lambdify_matrix(ps, A)
        Ap_rows = [[sp.diff(A[i][k], pj) for k in range(len(xs))] for pj in ps for i in range(len(xs))]
        Ap_fn = _lambdify_matrix(ps, Ap_rows) if Ap_rows else _lambdify_matrix(ps, [[sp.Integer(0)]])
        b_fn = _lambdify_matrix(ps, [[bi] for bi in b])
        bp_fn = _lambdify_matrix(ps, [[sp.diff(bi, pj) for pj in ps] for bi in b])

    routes: dict[str, RouteInput] = {}
    for route, di in template.doses.items():
        F = norm(di.bioavailability)
        routes[route] = RouteInput(
            route=route,
            state_index=template.state_names.index(di.state),
            bioavailability=_lambdify_matrix(ps, [[F]]),
            bioavailability_grad=_lambdify_matrix(ps, [[sp.diff(F, pj) for pj in ps]]),
            lag_index=template.parameter_names.index(di.lag) if di.lag else None,
        )

    # one generated function for states and forward sensitivities together (CSE shared)
    S = [[sp.Symbol(f"_s_{j}_{i}", real=True) for i in range(len(xs))] for j in range(len(ps))]
    sens_rhs = [
        sum((fx[i][m] * S[j][m] for m in range(len(xs))), sp.Integer(0)) + fp[i][j]
        for j in range(len(ps)) for i in range(len(xs))
    ]
    flat_S = [v for row in S for v in row]
    aug = sp.lambdify(xs + flat_S + ps, f + sens_rhs, modules="numpy", cse=True)
    flat = sp.lambdify(args, f, modules="numpy", cse=True)

    return Model(
        template=template,
        state_names=template.state_names,
        parameter_names=template.parameter_names,
        observable_names=template.observable_names,
        is_linear=is_linear,
        _f=_lambdify_matrix(args, [[fi] for fi in f]),
        _fx=_lambdify_matrix(args, fx),
        _fp=_lambdify_matrix(args, fp) if ps else _lambdify_matrix(args, [[sp.Integer(0)] * 0 for _ in f]),
        _g=_lambdify_matrix(args, [[gi] for gi in g]),
        _gx=_lambdify_matrix(args, gx),
        _gp=_lambdify_matrix(args, gp),
        _x0=_lambdify_matrix(ps, [[xi] for xi in x0]),
        _x0p=_lambdify_matrix(ps, x0p),
        _A=A_fn,
        _Ap=Ap_fn,
        _b=b_fn,
        _bp=bp_fn,
        routes=routes,
        _flat=flat,
        _aug=aug,
    )


_COMPILED: dict[tuple[Any, ...], Model] = {}


def compiled(template: Template) -> Model:
    """Compile ``template`` once per process and reuse it (keyed by name, source, settings)."""
    key = (template.name, template.source, tuple(sorted(template.settings.items())),
           tuple(str(template.equations[n]) for n in template.state_names),
           tuple(str(o.expression) for o in template.observables), template.parameter_names)
    m = _COMPILED.get(key)
    if m is None:
        m = compile_model(template)
        _COMPILED[key] = m
    return m


def _checked_value(p: Any, value: Any, template: str) -> float:
    """A user-given parameter value as float: finite, and not negative where the template's
    range for it starts at 0 or above (zero stays allowed: limit cases such as ``k12 = 0``)."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise UsageError(f"parameter {p.name} = {value!r} is not a number") from None
    if not math.isfinite(v):
        raise UsageError(f"parameter {p.name} = {v!r} must be a finite number")
    if p.lower >= 0 and v < 0:
        raise UsageError(f"parameter {p.name} = {v:g} {p.unit} is negative, but template {template!r} gives it "
                         f"the range {p.lower:g} to {p.upper:g}; give a value of 0 or more")
    return v
