"""Nonlinear models: LSODA on the states and the forward sensitivity equations.

``dS/dt = f_x S + f_θ`` is integrated with the states, by ``scipy.integrate.odeint`` (LSODA
with its step loop in compiled code; the default) or ``solve_ivp`` (the same method driven
from Python; kept as a cross-check). The generated right-hand side runs on Python floats
(:meth:`compartments.model.Model.rhs_point`).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray
from scipy.integrate import ODEintWarning, odeint, solve_ivp

from ..errors import SimulationError
from ..model import Model

Array = NDArray[np.float64]

#: Right-hand-side evaluations allowed for one simulation (a runaway solution or an
#: extremely stiff regime ends as a SimulationError instead of running for minutes).
MAX_EVALUATIONS = 50_000


class _Budget(Exception):
    """The integrator used up its evaluation budget."""


def lsoda_odeint(fun, jac, z0: Array, grid: Array, args: tuple, rtol: float, atol: float
                 ) -> tuple[Array, bool, str]:
    """One piece with ``scipy.integrate.odeint`` (LSODA; its step loop runs in compiled code,
    so a step costs one Python call of the right-hand side)."""
    with warnings.catch_warnings():  # the failure is reported through the message instead
        warnings.simplefilter("ignore", ODEintWarning)
        Y, info = odeint(fun, z0, grid, args=args, Dfun=jac, tfirst=True, rtol=rtol, atol=atol,
                         mxstep=MAX_EVALUATIONS, full_output=True)
    return Y, info["message"] == "Integration successful.", str(info["message"])


def lsoda_solve_ivp(fun, jac, z0: Array, grid: Array, args: tuple, rtol: float, atol: float
                    ) -> tuple[Array, bool, str]:
    """One piece with ``scipy.integrate.solve_ivp`` (LSODA driven from Python; the reference
    the faster driver above is checked against)."""
    sol = solve_ivp(fun, (grid[0], grid[-1]), z0, method="LSODA", t_eval=grid, args=args, rtol=rtol,
                    atol=atol, jac=jac)
    return sol.y.T, sol.status == 0, str(sol.message)


class OdePropagator:
    """Propagate ``[x; S]`` of any model with LSODA.

    ``S`` may carry more columns than the model has parameters: the extra columns follow
    ``dΨ/dt = f_x Ψ`` (sensitivities to the initial state; used for the monodromy matrix of
    a periodic steady state).
    """

    def __init__(self, model: Model, theta: Array, sens: bool, rtol: float, atol: float,
                 integrate: Callable = lsoda_odeint, max_evaluations: int = MAX_EVALUATIONS) -> None:
        self.model, self.theta, self.sens = model, theta, sens
        self.rtol, self.atol, self.integrate = rtol, atol, integrate
        self.budget = max_evaluations

    def _fun(self, cols: int) -> Callable:
        n, p = self.model.n_states, self.model.n_params
        model, theta = self.model, self.theta
        if cols in (0, p):
            # the integrator's inner loop: one generated call on Python floats, no other layer
            # (benchmarks/README.md, "Nonlinear templates")
            gen = model._aug if cols else model._flat
            th = [float(v) for v in theta]
            assert gen is not None

            def fun(_t: float, z: Array, c: Array | None) -> Array:
                self.budget -= 1
                if self.budget < 0:
                    raise _Budget
                out = np.array(gen(*z.tolist(), *th), dtype=float)
                if c is not None:  # constant inputs (infusions) on the states and their sensitivities
                    out += c
                return out

            return fun

        def rhs(z: Array) -> Array:
            x = z[:n]
            W = z[n:].reshape(cols, n).T
            fp = np.zeros((n, cols))
            fp[:, :p] = model.jac_params(x, theta)
            return np.concatenate([model.rhs(x, theta), (model.jac_states(x, theta) @ W + fp).T.reshape(-1)])

        def slow(_t: float, z: Array, c: Array | None) -> Array:
            self.budget -= 1
            if self.budget < 0:
                raise _Budget
            out = rhs(z)
            if c is not None:
                out += c
            return out

        return slow

    def _jac(self, cols: int) -> Callable:
        n, model, theta = self.model.n_states, self.model, self.theta

        def jac(_t: float, z: Array, c: Array | None) -> Array:
            J = model.jac_states(z[:n], theta)
            return J if not cols else np.kron(np.eye(cols + 1), J)

        return jac

    def __call__(self, x: Array, S: Array | None, u: Array, uS: Array, start: float, taus: Array
                 ) -> tuple[Array, Array | None]:
        n = x.size
        cols = 0 if S is None else S.shape[1]
        z0 = x.copy() if S is None else np.concatenate([x, S.T.reshape(-1)])
        grid = np.unique(np.r_[0.0, taus])
        if grid.size == 1:
            Y = z0[None, :]
        else:
            uS_full = np.zeros((n, cols))
            uS_full[:, : uS.shape[1]] = uS if cols else 0.0
            c = np.concatenate([u, uS_full.T.reshape(-1)]) if cols else u.copy()
            Y = self._integrate(z0, grid, c if np.any(c) else None, cols, start)
        Z = Y[np.searchsorted(grid, taus)]
        X = Z[:, :n]
        Ss = Z[:, n:].reshape(-1, cols, n).transpose(0, 2, 1) if cols else None
        return X, Ss

    def _integrate(self, z0: Array, grid: Array, c: Array | None, cols: int, start: float) -> Array:
        name = self.model.template.name
        try:
            with np.errstate(over="raise", invalid="raise"):
                Y, ok, message = self.integrate(self._fun(cols), self._jac(cols), z0, grid, (c,), self.rtol,
                                                self.atol)
        except (_Budget, FloatingPointError):
            raise SimulationError(
                f"the integrator gave up on {name!r} between t={start:g} and t={start + grid[-1]:g}: "
                "the solution grows without bound or needs too many steps at these parameters"
            ) from None
        if not ok or not np.all(np.isfinite(Y)):
            raise SimulationError(
                f"the integrator failed for {name!r} between t={start:g} and t={start + grid[-1]:g}: {message}; "
                "the parameters may be extreme or the model stiff"
            )
        return Y
