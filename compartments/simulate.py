"""Simulate a compiled model under a dosing history: states, observables, sensitivities.

The solving is done by :mod:`compartments.engine` (see there for the methods):

* linear models (``f = A x + b``): exactly, by the eigen-decomposition of ``A(θ)`` with all
  samples and doses at once and analytic sensitivities (:mod:`compartments.engine.linear`);
  where eigenvalues are complex or nearly repeated, by the matrix exponential of an
  augmented matrix that also carries the constant inputs and the forward parameter
  sensitivities (Van Loan's block construction; Van Loan 1978, IEEE TAC 23:395);
* nonlinear models: LSODA (``scipy.integrate.odeint``; ``solve_ivp`` on request) on the
  states and the forward sensitivity equations ``dS/dt = f_x S + f_θ``.

Dose records may carry additional doses and steady state (:mod:`compartments.dosing`).
A sample taken at the same time as a dose sees the state *before* that dose (a pre-dose
sample; common practice). A lag time ``ℓ(θ)`` moves the event, and its sensitivity jumps
by ``(f(x⁻) − f(x⁺))·∂ℓ/∂θ`` at the event.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ._threads import limit_blas_threads
from .dosing import Dose
from .engine import METHODS, solve_states
from .errors import SimulationError, UsageError
from .model import Model

Array = NDArray[np.float64]

limit_blas_threads()


@dataclass(frozen=True)
class SimulationResult:
    """States and observables at the requested times.

    Attributes
    ----------
    times : (T,) array
    states : (T, n) array
    observables : (T, m) array
    state_sensitivities : (T, n, p) array or None
        ∂x/∂θ for every template parameter.
    observable_sensitivities : (T, m, p) array or None
        ∂y/∂θ.
    """

    times: Array
    states: Array
    observables: Array
    state_names: tuple[str, ...]
    observable_names: tuple[str, ...]
    parameter_names: tuple[str, ...]
    state_sensitivities: Array | None = None
    observable_sensitivities: Array | None = None

    def observable(self, name: str | None = None) -> Array:
        """Values of one observable (the only one when ``name`` is None)."""
        return self.observables[:, self._obs_index(name)]

    def sensitivity(self, name: str | None = None) -> Array:
        """(T, p) sensitivities of one observable."""
        if self.observable_sensitivities is None:
            raise UsageError("simulate(..., sensitivities=True) was not requested")
        return self.observable_sensitivities[:, self._obs_index(name), :]

    def state(self, name: str) -> Array:
        return self.states[:, self.state_names.index(name)]

    def _obs_index(self, name: str | None) -> int:
        if name is None:
            return 0
        try:
            return self.observable_names.index(name)
        except ValueError:
            raise UsageError(
                f"observable {name!r} is not in this model; it has {', '.join(self.observable_names)}"
            ) from None


def simulate(
    model: Model,
    params: Mapping[str, float] | Sequence[float] | Array | None,
    doses: Sequence[Dose],
    times: Any,
    *,
    sensitivities: bool = False,
    method: str = "auto",
    rtol: float = 1e-8,
    atol: float | None = None,
) -> SimulationResult:
    """Simulate ``model`` at ``times`` (h, ≥ 0) under ``doses``.

    Parameters
    ----------
    model : Model
    params : mapping or sequence
        Parameter values (missing ones take the template defaults).
    doses : sequence of Dose
    times : array-like, h
        Sample times, any order, duplicates allowed; initial conditions hold at t = 0.
    sensitivities : bool
        Also return ∂x/∂θ and ∂y/∂θ.
    method : {"auto", "expm", "ode", "ivp"}
        ``auto`` uses the exact engine for linear models and ``ode`` otherwise; ``expm``
        forces the augmented matrix exponential (the reference for linear models).
        ``ode`` integrates with LSODA through ``scipy.integrate.odeint``; ``ivp`` with LSODA
        through ``scipy.integrate.solve_ivp`` (slower; kept as a cross-check).
    rtol, atol : float
        Integrator tolerances (``ode`` and ``ivp`` only).

    Examples
    --------
    >>> from compartments import load_template, Dose
    >>> from compartments.model import compile_model
    >>> m = compile_model(load_template("one-comp-iv"))
    >>> r = simulate(m, {"ke": 0.1, "V": 10}, [Dose(0, 100)], [0.0, 1.0])
    >>> round(float(r.observable()[1]), 4)  # 10·e^{-0.1}
    9.0484
    """
    theta = model.param_vector(params)
    t = np.asarray(times, dtype=float).reshape(-1)
    if t.size and (not np.all(np.isfinite(t)) or t.min() < 0):
        raise UsageError("sample times must be finite and ≥ 0 (hours after the start)")
    if method not in METHODS:
        raise UsageError(f"method must be one of {', '.join(repr(m) for m in METHODS)}, got {method!r}")
    X, S = solve_states(model, theta, doses, t, sensitivities, method=method, rtol=rtol, atol=atol)
    if not (np.all(np.isfinite(X)) and (S is None or np.all(np.isfinite(S)))):
        raise SimulationError(
            f"simulation of {model.template.name!r} produced non-finite values; "
            "the parameters may be extreme for this model"
        )
    Y = model.observe(X.T, theta).T if t.size else np.zeros((0, len(model.observable_names)))
    YS = None
    if sensitivities and S is not None:
        gx = model.observe_jac_states(X.T, theta)  # (m, n, T)
        gp = model.observe_jac_params(X.T, theta)  # (m, p, T)
        T = t.size
        gx = np.broadcast_to(gx if gx.ndim == 3 else gx[..., None], gx.shape[:2] + (T,))
        gp = np.broadcast_to(gp if gp.ndim == 3 else gp[..., None], gp.shape[:2] + (T,))
        YS = np.einsum("mnt,tnp->tmp", gx, S) + np.moveaxis(gp, -1, 0)
    return SimulationResult(
        times=t,
        states=X,
        observables=Y,
        state_names=model.state_names,
        observable_names=model.observable_names,
        parameter_names=model.parameter_names,
        state_sensitivities=S,
        observable_sensitivities=YS,
    )
