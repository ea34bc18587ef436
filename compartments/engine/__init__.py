"""The solving engine: states and parameter sensitivities of a compiled model under doses.

Modules
-------
``schedule``
    Dose records → pulses and segments (additional doses, steady-state records).
``stepping``
    The general path: carry the state from event to event with a propagator.
``expm``
    Linear models by augmented matrix exponentials (the reference path).
``ode``
    Nonlinear models by LSODA with forward sensitivities.
``periodic``
    The periodic steady state of a regimen for the stepping paths.
``kernels``, ``layout``, ``linear``
    Linear models by the eigen-decomposition of ``A(θ)``, all samples and doses at once.
``batch``
    :func:`prepare` / :class:`Design`: many subjects laid out once, evaluated in one call.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from ..dosing import Dose
from ..errors import UsageError
from ..model import Model
from . import expm, ode, periodic, stepping
from .schedule import Schedule, build_schedule, lag_bounds

Array = NDArray[np.float64]

#: Solver choices of :func:`solve_states` (and ``simulate(method=...)``).
METHODS = ("auto", "expm", "ode", "ivp")


def solve_states(model: Model, theta: Array, doses: Sequence[Dose] | Schedule, t: Array, sens: bool, *,
                 method: str = "auto", rtol: float = 1e-8, atol: float | None = None
                 ) -> tuple[Array, Array | None]:
    """States (T, n) and, with ``sens``, sensitivities ∂x/∂θ (T, n, p) at times ``t``.

    Parameters
    ----------
    method : {"auto", "expm", "ode", "ivp"}
        ``auto``: the eigen-decomposition engine for linear models (:mod:`.linear`, falling
        back to the matrix exponential where it does not apply), LSODA through ``odeint``
        otherwise; ``expm``: augmented matrix exponentials (linear models only, the
        reference); ``ode`` / ``ivp``: LSODA through ``odeint`` / ``solve_ivp``.
    rtol, atol : float
        Integrator tolerances (``ode`` and ``ivp``).
    """
    use_expm = method == "expm"
    if use_expm and not model.is_linear:
        raise UsageError(f"template {model.template.name!r} is nonlinear; the matrix exponential does not apply")
    schedule = doses if isinstance(doses, Schedule) else build_schedule(model, doses, lag_bounds(model, theta))
    if method == "auto" and model.is_linear:
        from .batch import prepare

        design = prepare(model, [(schedule, t)], max_lag=lag_bounds(model, theta))
        X, S, _ = design.states(theta[None, :], sensitivities=sens)
        return X, S
    if use_expm:
        prop: stepping.Propagator = expm.ExpmPropagator(model, theta, sens)

        def steady(seg):  # noqa: ANN001, ANN202
            return periodic.periodic_state(model, theta, seg, prop, sens,
                                           monodromy=lambda: expm.monodromy(model, theta, seg.interval))
    else:
        a_tol = atol if atol is not None else rtol * 1e-3 * _scale(model, theta, schedule)
        prop = ode.OdePropagator(model, theta, sens, rtol, a_tol,
                                 integrate=ode.lsoda_solve_ivp if method == "ivp" else ode.lsoda_odeint)

        def steady(seg):  # noqa: ANN001, ANN202
            return periodic.periodic_state(model, theta, seg, prop, sens, rtol=rtol)
    return stepping.solve(model, theta, schedule, t, sens, prop, steady)


def _scale(model: Model, theta: Array, schedule: Schedule) -> float:
    """Amount scale for the integrator's absolute tolerance: the initial state, doses, rates."""
    x0 = model.initial(theta)
    sizes = [1.0, float(np.max(np.abs(x0))) if x0.size else 0.0]
    sizes += [abs(p.amount) for p in schedule.pulses]
    sizes += [abs(p.rate) for p in schedule.pulses]
    return max(sizes)


from .batch import Design, prepare  # noqa: E402  (batch uses solve_states above)

__all__ = ["METHODS", "Design", "prepare", "solve_states"]
