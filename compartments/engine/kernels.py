"""Fused numeric kernels of a compiled linear model, built once per model.

The eigen engine needs, for every subject's parameters, the system matrix ``A(θ)`` and
input ``b(θ)`` with their parameter derivatives, the initial state with its derivative,
and each route's bioavailability with its gradient; and, per sample, the observables with
their derivatives. Calling the model's separate compiled functions costs about ten Python
calls per evaluation; here each group is one generated function (sympy, common
subexpressions shared) that takes parameter *columns* (one value per subject) and returns
one ``(K, N)`` array. Constant entries are multiplied by a column of ones so that every
entry has the same shape and the result is a single array.
"""

from __future__ import annotations

import weakref
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import sympy as sp
from numpy.typing import NDArray

from ..model import Model

Array = NDArray[np.float64]


@dataclass(frozen=True)
class LinearKernel:
    """Generated functions of one linear model and the layout of their outputs.

    ``parts(theta_columns) -> (K, N)`` stacks, in this order: ``A`` (n·n, row-major),
    ``dA/dθ`` (p·n·n, parameter-major), ``b`` (n), ``db/dθ`` (n·p), ``x0`` (n),
    ``dx0/dθ`` (n·p), and per route ``F`` (1) and ``dF/dθ`` (p).
    ``observe(x_columns, theta_columns) -> (L, T)`` stacks ``g`` (m), ``dg/dx`` (m·n),
    ``dg/dθ`` (m·p).
    """

    n: int
    p: int
    m: int
    routes: tuple[str, ...]
    has_input: bool  # b(θ) is not identically zero
    x0_zero: bool  # the initial state is identically zero
    dF_zero: bool  # no route's bioavailability depends on the parameters
    _parts: Callable[..., list]
    _observe: Callable[..., list]

    def parts(self, theta: Array) -> Array:
        """(K, N) array of the linear parts for parameter rows ``theta`` (N, p)."""
        one = np.ones(theta.shape[0])
        return np.array(self._parts(*theta.T, one), dtype=float)

    def observe(self, x: Array, theta: Array) -> Array:
        """(L, T) array of observables and derivatives for states ``x`` (T, n) and parameter
        rows ``theta`` (T, p)."""
        one = np.ones(x.shape[0])
        return np.array(self._observe(*x.T, *theta.T, one), dtype=float)


_KERNELS: weakref.WeakKeyDictionary[Model, LinearKernel] = weakref.WeakKeyDictionary()


def linear_kernel(model: Model) -> LinearKernel:
    """The fused kernels of a linear ``model`` (generated on first use, then reused)."""
    k = _KERNELS.get(model)
    if k is None:
        k = _build(model)
        _KERNELS[model] = k
    return k


def _build(model: Model) -> LinearKernel:
    t = model.template
    xs = [sp.Symbol(n, real=True) for n in t.state_names]
    ps = [sp.Symbol(n, real=True) for n in t.parameter_names]
    by_name = {s.name: s for s in xs + ps}
    one = sp.Symbol("_one", real=True)

    def norm(e: object) -> sp.Expr:
        e = sp.sympify(e) if not isinstance(e, sp.Basic) else e  # numbers only, never user text
        return e.xreplace({s: by_name[s.name] for s in e.free_symbols if s.name in by_name})

    f = sp.Matrix([norm(t.equations[s]) for s in t.state_names])
    A = f.jacobian(xs)
    b = f.subs({x: 0 for x in xs})
    theta = sp.Matrix(ps)
    Ap = [A.diff(q) for q in ps]
    x0 = sp.Matrix([norm(s.initial) for s in t.states])
    entries: list[sp.Expr] = list(A) + [e for M in Ap for e in M] + list(b) + list(b.jacobian(theta))
    entries += list(x0) + list(x0.jacobian(theta))
    routes = tuple(model.routes)
    dF_zero = True
    for r in routes:
        F = norm(t.doses[r].bioavailability)
        grad = [sp.diff(F, q) for q in ps]
        dF_zero &= all(g == 0 for g in grad)
        entries += [F, *grad]
    g = sp.Matrix([norm(o.expression) for o in t.observables])
    obs = list(g) + list(g.jacobian(xs)) + list(g.jacobian(theta))
    parts = sp.lambdify(ps + [one], _ones(entries, one), modules="numpy", cse=True)
    observe = sp.lambdify(xs + ps + [one], _ones(obs, one), modules="numpy", cse=True)
    return LinearKernel(
        n=len(xs), p=len(ps), m=len(g), routes=routes,
        has_input=any(e != 0 for e in b), x0_zero=all(e == 0 for e in x0), dF_zero=dF_zero,
        _parts=parts, _observe=observe,
    )


def _ones(exprs: Sequence[sp.Expr], one: sp.Symbol) -> list[sp.Expr]:
    """Entries without symbols become ``value·one`` (an array of the common shape)."""
    out = []
    for e in exprs:
        e = sp.sympify(e)
        out.append(e if e.free_symbols else sp.Mul(e, one, evaluate=False))
    return out
