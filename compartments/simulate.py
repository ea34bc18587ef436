"""Exact piecewise simulation of a compiled model under a dosing history.

Time is cut at every dose event (bolus, start and end of an infusion, after any lag) and
the solution is carried across each piece:

* linear models (``f = A x + b``): exactly, by the matrix exponential of an augmented
  matrix that also carries the constant inputs and, on request, the forward parameter
  sensitivities (Van Loan's block construction; Van Loan 1978, IEEE TAC 23:395);
* nonlinear models: LSODA (``scipy.integrate.odeint``; ``solve_ivp`` on request) on the
  states and the forward sensitivity equations ``dS/dt = f_x S + f_θ``.

A sample taken at the same time as a dose sees the state *before* that dose (a pre-dose
sample; common practice). A lag time ``τ(θ)`` moves the event, and its sensitivity jumps
by ``(f(x⁻) − f(x⁺))·∂τ/∂θ`` at the event.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.integrate import ODEintWarning, odeint, solve_ivp
from scipy.linalg import expm

from ._threads import limit_blas_threads
from .dosing import Dose, resolve_route
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


@dataclass
class _Event:
    time: float
    state: int
    jump: float  # bolus amount arriving (after bioavailability)
    jump_grad: Array  # (p,) derivative of the jump
    rate_change: float  # change of infusion input into `state`
    rate_grad: Array  # (p,)
    lag_index: int | None


def _events(model: Model, doses: Sequence[Dose], theta: Array) -> list[_Event]:
    p = model.n_params
    out: list[_Event] = []
    for d in doses:
        route = resolve_route(d.route, tuple(model.routes), model.template.name)
        entry = model.routes[route]
        F = float(entry.bioavailability(*theta).reshape(-1)[0])
        dF = entry.bioavailability_grad(*theta).reshape(-1)
        lag = float(theta[entry.lag_index]) if entry.lag_index is not None else 0.0
        t0 = float(d.time) + lag
        zero = np.zeros(p)
        if d.route == "infusion":
            rate = d.infusion_rate
            dur = d.infusion_duration
            out.append(_Event(t0, entry.state_index, 0.0, zero, rate * F, rate * dF, entry.lag_index))
            out.append(_Event(t0 + dur, entry.state_index, 0.0, zero, -rate * F, -rate * dF, entry.lag_index))
        else:
            out.append(_Event(t0, entry.state_index, d.amount * F, d.amount * dF, 0.0, zero, entry.lag_index))
    out.sort(key=lambda e: e.time)
    return out


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
        ``auto`` uses the matrix exponential for linear models and ``ode`` otherwise.
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
    if method not in ("auto", "expm", "ode", "ivp"):
        raise UsageError(f"method must be 'auto', 'expm', 'ode' or 'ivp', got {method!r}")
    use_expm = model.is_linear if method == "auto" else method == "expm"
    if use_expm and not model.is_linear:
        raise UsageError(f"template {model.template.name!r} is nonlinear; the matrix exponential does not apply")
    events = _events(model, doses, theta)
    if events and events[0].time < 0:
        raise UsageError("dose times (after any lag) must be ≥ 0")
    if use_expm:
        X, S = _solve_expm(model, theta, events, t, sensitivities, rtol, atol)
    else:
        X, S = _solve_ode(model, theta, events, t, sensitivities, rtol, atol,
                          integrate=_lsoda_solve_ivp if method == "ivp" else _lsoda_odeint)
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


def _intervals(events: list[_Event], t: Array) -> list[tuple[float, float, list[_Event]]]:
    """Cut [0, end] at distinct event times: (start, end, events applied at start)."""
    cuts: list[tuple[float, list[_Event]]] = [(0.0, [])]
    for e in events:
        # events sharing a time form one cut; the initial cut (t = 0, no events) stays
        # apart so that samples at t = 0 see the initial state (pre-dose)
        if cuts[-1][1] and cuts[-1][0] == e.time:
            cuts[-1][1].append(e)
        else:
            cuts.append((e.time, [e]))
    out = []
    for i, (start, evs) in enumerate(cuts):
        stop = cuts[i + 1][0] if i + 1 < len(cuts) else np.inf
        out.append((start, stop, evs))
    return out


def _apply(model: Model, theta: Array, x: Array, S: Array | None, u: Array, uS: Array,
           evs: list[_Event]) -> tuple[Array, Array | None, Array, Array]:
    """Apply the events at one time: jumps in states, changes in inputs, lag sensitivities."""
    for e in evs:
        x_before = x.copy()
        u_before = u.copy()
        x = x.copy()
        u = u.copy()
        uS = uS.copy()
        x[e.state] += e.jump
        u[e.state] += e.rate_change
        uS[e.state] += e.rate_grad
        if S is not None:
            S = S.copy()
            S[e.state] += e.jump_grad
            if e.lag_index is not None:
                f_before = model.rhs(x_before, theta) + u_before
                f_after = model.rhs(x, theta) + u
                S[:, e.lag_index] += f_before - f_after
    return x, S, u, uS


def _propagate(big: Array, N: int, z0: Array, taus: Array) -> Array:
    """States at offsets ``taus`` (sorted) from ``z0`` under ``dz/dt = M z + c`` (augmented).

    Few offsets: one batched matrix exponential. Many offsets (a fine grid): step from
    one to the next, reusing the exponential of each distinct step (a uniform grid needs
    one), by the semigroup property e^{M(a+b)} = e^{Ma} e^{Mb}.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        if taus.size <= 16:
            E = expm(big[None, :, :] * taus[:, None, None])  # (K, N+1, N+1)
            return E[:, :N, :N] @ z0 + E[:, :N, N]
        steps = np.diff(np.r_[0.0, taus])
        scale = max(float(taus[-1]), 1e-300)
        keys = np.round(steps / scale, 12)
        uniq, inverse = np.unique(keys, return_inverse=True)
        reps = {}
        for j in range(uniq.size):
            first = int(np.flatnonzero(inverse == j)[0])
            reps[j] = expm(big * steps[first])
        out = np.empty((taus.size, N))
        z = np.r_[z0, 1.0]
        for i in range(taus.size):
            z = reps[int(inverse[i])] @ z
            out[i] = z[:N]
        return out


def _solve_expm(model: Model, theta: Array, events: list[_Event], t: Array, sens: bool,
                rtol: float, atol: float | None) -> tuple[Array, Array | None]:
    n, p = model.n_states, model.n_params
    A, b, Ap, bp = model.linear_parts(theta)
    X = np.zeros((t.size, n))
    S_out = np.zeros((t.size, n, p)) if sens else None
    x = model.initial(theta)
    S = model.initial_jac(theta).reshape(n, p) if sens else None
    u = np.zeros(n)
    uS = np.zeros((n, p))
    N = n * (p + 1) if sens else n
    big = np.zeros((N + 1, N + 1))
    big[:n, :n] = A
    if sens:
        for j in range(p):
            blk = slice(n * (j + 1), n * (j + 2))
            big[blk, blk] = A
            big[blk, :n] = Ap[j]
    order = np.argsort(t, kind="stable")
    ts = t[order]
    k = 0
    for start, stop, evs in _intervals(events, t):
        # samples at exactly `start` that precede this cut's events were taken before the
        # dose: they are recorded by the previous interval (closed on the right).
        x, S, u, uS = _apply(model, theta, x, S, u, uS, evs)
        hi = np.searchsorted(ts, stop, side="left") if np.isfinite(stop) else ts.size
        # include samples equal to `stop` (pre-dose of the next event) in this interval
        if np.isfinite(stop):
            hi = np.searchsorted(ts, stop, side="right")
        taus = ts[k:hi] - start
        need_end = np.isfinite(stop)
        all_taus = np.concatenate([taus, [stop - start]]) if need_end else taus
        if all_taus.size == 0:
            continue
        c = b + u
        big[:n, N] = c
        if sens:
            cS = bp + uS
            for j in range(p):
                big[n * (j + 1): n * (j + 2), N] = cS[:, j]
        z0 = np.concatenate([x, S.T.reshape(-1)]) if sens else x
        Z = _propagate(big, N, z0, all_taus)
        for i in range(taus.size):
            idx = order[k + i]
            X[idx] = Z[i, :n]
            if sens:
                S_out[idx] = Z[i, n:].reshape(p, n).T  # type: ignore[index]
        k = hi
        if need_end:
            x = Z[-1, :n].copy()
            if sens:
                S = Z[-1, n:].reshape(p, n).T.copy()
    return X, S_out


class _Budget(Exception):
    """The integrator used up its evaluation budget."""


#: Right-hand-side evaluations allowed for one simulation (a runaway solution or an
#: extremely stiff regime ends as a SimulationError instead of running for minutes).
MAX_EVALUATIONS = 50_000


def _lsoda_odeint(fun, jac, z0: Array, grid: Array, args: tuple, rtol: float, atol: float
                  ) -> tuple[Array, bool, str]:
    """One piece with ``scipy.integrate.odeint`` (LSODA; its step loop runs in compiled code,
    so a step costs one Python call of the right-hand side)."""
    with warnings.catch_warnings():  # the failure is reported through the message instead
        warnings.simplefilter("ignore", ODEintWarning)
        Y, info = odeint(fun, z0, grid, args=args, Dfun=jac, tfirst=True, rtol=rtol, atol=atol,
                         mxstep=MAX_EVALUATIONS, full_output=True)
    return Y, info["message"] == "Integration successful.", str(info["message"])


def _lsoda_solve_ivp(fun, jac, z0: Array, grid: Array, args: tuple, rtol: float, atol: float
                     ) -> tuple[Array, bool, str]:
    """One piece with ``scipy.integrate.solve_ivp`` (LSODA driven from Python; the reference
    the faster driver above is checked against)."""
    sol = solve_ivp(fun, (grid[0], grid[-1]), z0, method="LSODA", t_eval=grid, args=args, rtol=rtol,
                    atol=atol, jac=jac)
    return sol.y.T, sol.status == 0, str(sol.message)


def _solve_ode(model: Model, theta: Array, events: list[_Event], t: Array, sens: bool,
               rtol: float, atol: float | None, max_evaluations: int = MAX_EVALUATIONS,
               integrate=_lsoda_odeint) -> tuple[Array, Array | None]:
    n, p = model.n_states, model.n_params
    X = np.zeros((t.size, n))
    S_out = np.zeros((t.size, n, p)) if sens else None
    x = model.initial(theta)
    S = model.initial_jac(theta).reshape(n, p) if sens else None
    u = np.zeros(n)
    uS = np.zeros((n, p))
    scale = max(1.0, float(np.max(np.abs(x))) if n else 1.0,
                max((abs(e.jump) for e in events), default=0.0),
                max((abs(e.rate_change) for e in events), default=0.0))
    a_tol = atol if atol is not None else rtol * 1e-3 * scale
    order = np.argsort(t, kind="stable")
    ts = t[order]
    k = 0

    budget = [max_evaluations]
    rhs = model.rhs_point(theta, sens)

    def fun(_t: float, z: Array, c: Array | None) -> Array:
        budget[0] -= 1
        if budget[0] < 0:
            raise _Budget
        out = rhs(z)
        if c is not None:  # constant inputs (infusions) on the states and their sensitivities
            out += c
        return out

    def jac(_t: float, z: Array, c: Array | None) -> Array:
        J = model.jac_states(z[:n], theta)
        if not sens:
            return J
        return np.kron(np.eye(p + 1), J)

    for start, stop, evs in _intervals(events, t):
        x, S, u, uS = _apply(model, theta, x, S, u, uS, evs)
        hi = np.searchsorted(ts, stop, side="right") if np.isfinite(stop) else ts.size
        t_eval = ts[k:hi]
        end = stop if np.isfinite(stop) else (float(t_eval[-1]) if t_eval.size else start)
        z0 = np.concatenate([x, S.T.reshape(-1)]) if sens else x.copy()
        if end > start:
            grid = np.unique(np.r_[start, t_eval, end])
            try:
                with np.errstate(over="raise", invalid="raise"):
                    c = np.concatenate([u, uS.T.reshape(-1)]) if sens else u.copy()
                    Y, ok, message = integrate(fun, jac, z0, grid, (c if np.any(c) else None,), rtol, a_tol)
            except (_Budget, FloatingPointError):
                raise SimulationError(
                    f"the integrator gave up on {model.template.name!r} between t={start:g} and t={end:g}: "
                    "the solution grows without bound or needs too many steps at these parameters"
                ) from None
            if not ok or not np.all(np.isfinite(Y)):
                raise SimulationError(
                    f"the integrator failed for {model.template.name!r} between t={start:g} and "
                    f"t={end:g}: {message}; the parameters may be extreme or the model stiff"
                )
            for i in range(t_eval.size):
                j = int(np.searchsorted(grid, t_eval[i]))
                idx = order[k + i]
                z = Y[j]
                X[idx] = z[:n]
                if sens:
                    S_out[idx] = z[n:].reshape(p, n).T  # type: ignore[index]
            zend = Y[-1]
        else:
            for i in range(t_eval.size):
                idx = order[k + i]
                X[idx] = x
                if sens:
                    S_out[idx] = S  # type: ignore[index]
            zend = z0
        k = hi
        x = zend[:n].copy()
        if sens:
            S = zend[n:].reshape(p, n).T.copy()
    return X, S_out
