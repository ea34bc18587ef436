"""Periodic steady state of a regimen for the event-stepping paths.

A steady-state record at ``t₀`` with interval τ asks for the state just before ``t₀`` under
the regimen given for ever before: the fixed point ``x* = P(x*)`` of the *period map* ``P``,
which carries the state from ``t₀`` over one whole period ``[t₀, t₀ + τ)`` with the
regimen's doses in it (and any of its infusions running at ``t₀``).

* **Linear models** (augmented matrix exponential): ``P(x) = M x + P(0)`` with
  ``M = e^{Aτ}``, so ``x* = (I − M)⁻¹ P(0)`` in one step (the geometric series of the
  transition matrix); sensitivities ``S* = (I − M)⁻¹ ∂P/∂θ``, the partial derivative
  taken at ``x*``. No steady state exists when ``M`` has an eigenvalue on or outside the
  unit circle (a state that never settles).
* **Nonlinear models** (LSODA): Newton's method on ``P(x) − x``, each iteration integrating
  one whole period together with the monodromy matrix ``M = ∂P/∂x`` (variational
  equations) and the parameter sensitivities; a step that does not reduce the residual
  is halved. Converged when ``‖P(x) − x‖∞ ≤ max(100·rtol, 1e-12) · scale`` (``scale``: the
  largest amount in the state or given per dose); at most :data:`MAX_PERIODS` periods are
  integrated, else a :class:`~compartments.errors.SimulationError` says so. Then
  ``S* = (I − M)⁻¹ ∂P/∂θ`` as above.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray

from ..errors import SimulationError
from ..model import Model
from .schedule import Pulse, Segment
from .stepping import Event, Propagator, pulse_events, step

Array = NDArray[np.float64]

#: Most periods integrated to reach the periodic state of a nonlinear model.
MAX_PERIODS = 50


def regimen_events(model: Model, seg: Segment, theta: Array) -> tuple[list[Event], Array, Array]:
    """Events of one period ``[t₀, t₀ + τ)`` of the regimen and the input running at ``t₀``
    (from its past doses): (events, u₀, uS₀)."""
    reg = seg.regimen
    assert reg is not None
    t0, tau = seg.start, seg.interval
    pulses = [Pulse(t0 - k * tau, reg.amount, reg.route, reg.duration, reg.rate, reg.segment, past=k > 0)
              for k in range(seg.tail_from - 1, -1, -1)]
    events = pulse_events(model, pulses, theta)
    n, p = model.n_states, model.n_params
    u, uS = np.zeros(n), np.zeros((n, p))
    for e in events:
        if e.time < t0:
            u[e.state] += e.rate_change
            uS[e.state] += e.rate_grad
    window = [e for e in events if t0 <= e.time < t0 + tau]
    return window, u, uS


def periodic_state(model: Model, theta: Array, seg: Segment, propagate: Propagator, sens: bool, *,
                   monodromy: Callable[[], Array] | None = None, rtol: float = 1e-8
                   ) -> tuple[Array, Array, Array, Array]:
    """State, sensitivities (n, p), input and its sensitivities just before a steady-state record.

    Parameters
    ----------
    monodromy : callable, optional
        ``() -> M`` for a linear model (``e^{Aτ}``); without it the monodromy matrix is
        integrated with the period (nonlinear models).
    rtol : float
        The integrator's relative tolerance (sets the convergence threshold).
    """
    n, p = model.n_states, model.n_params
    window, u0, uS0 = regimen_events(model, seg, theta)
    t0, tau = seg.start, seg.interval
    empty = np.zeros(0)
    dose_scale = max([abs(e.jump) for e in window] + [abs(e.rate_change) * tau for e in window] + [1e-300])

    def period(x: Array, S0: Array | None) -> tuple[Array, Array | None]:
        _, _, x_end, S_end, _, _ = step(model, theta, propagate, x, S0, u0, uS0, window, t0, empty, t0 + tau)
        return x_end, S_end

    if monodromy is not None:
        M = monodromy()
        _check_settles(model, M, tau)
        x_zero, _ = period(np.zeros(n), None)
        x = np.linalg.solve(np.eye(n) - M, x_zero)
        if not sens:
            return x, np.zeros((n, p)), u0, uS0
        _, Q = period(x, np.zeros((n, p)))
        return x, np.linalg.solve(np.eye(n) - M, Q), u0, uS0
    return _newton(model, theta, period, u0, uS0, dose_scale, sens, rtol, t0)


def _newton(model: Model, theta: Array, period: Callable, u0: Array, uS0: Array, dose_scale: float,
            sens: bool, rtol: float, t0: float) -> tuple[Array, Array, Array, Array]:
    n, p = model.n_states, model.n_params
    S0 = np.hstack([np.zeros((n, p)), np.eye(n)])
    x = model.initial(theta)
    used = 0

    def evaluate(x: Array) -> tuple[Array, Array, Array, float]:
        nonlocal used
        used += 1
        x_end, W = period(x, S0)
        r = x_end - x
        return r, W[:, :p], W[:, p:], float(np.max(np.abs(r)))

    r, Q, M, size = evaluate(x)
    while True:
        scale = max(float(np.max(np.abs(x))), dose_scale)
        if size <= max(100 * rtol, 1e-12) * scale:
            break
        if used >= MAX_PERIODS:
            raise SimulationError(
                f"no periodic steady state of {model.template.name!r} for the steady-state dose at t={t0:g} "
                f"within {MAX_PERIODS} periods (residual {size / scale:.1e} of the amounts); the regimen may "
                "not settle at these parameters"
            )
        try:
            dx = np.linalg.solve(np.eye(n) - M, r)
        except np.linalg.LinAlgError:
            raise SimulationError(_no_settle(model.template.name)) from None
        lam = 1.0
        while True:
            trial = x + lam * dx
            r_t, Q_t, M_t, size_t = evaluate(trial)
            if size_t < size or used >= MAX_PERIODS:
                break
            lam /= 2
        x, r, Q, M, size = trial, r_t, Q_t, M_t, size_t
    S = np.linalg.solve(np.eye(n) - M, Q) if sens else np.zeros((n, p))
    return x, S, u0, uS0


def _check_settles(model: Model, M: Array, tau: float) -> None:
    rho = float(np.max(np.abs(np.linalg.eigvals(M)))) if M.size else 0.0
    if not rho < 1.0 - 1e-12:
        raise SimulationError(_no_settle(model.template.name))


def _no_settle(name: str) -> str:
    return (f"template {name!r} has an amount that never settles under a repeated regimen at these parameters "
            "(no elimination from it), so a steady-state dose has no steady state to start from")
