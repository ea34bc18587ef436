"""Event-stepping solution: carry the states (and sensitivities) from one dose event to the next.

This is the general path: nonlinear models (LSODA, :mod:`.ode`) and the reference path for
linear ones (augmented matrix exponential, :mod:`.expm`). A *propagator* advances the
states over one stretch without events; this module cuts time at the events of a
:class:`~.schedule.Schedule`, applies them, and handles segments (steady-state records,
whose periodic state comes from :mod:`.periodic`).

A sample taken at the same time as a dose sees the state *before* that dose (a pre-dose
sample; common practice). A lag time ``ℓ(θ)`` moves the event, and the sensitivity jumps
by ``(f(x⁻) − f(x⁺))·∂ℓ/∂θ`` at the event.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Protocol

import numpy as np
from numpy.typing import NDArray

from ..errors import UsageError
from ..model import Model
from .schedule import Pulse, Schedule, Segment

Array = NDArray[np.float64]


@dataclass
class Event:
    """One change at one time, with parameter values in: a jump of a state, or a change of
    the constant input into a state."""

    time: float
    state: int
    jump: float  # bolus amount arriving (after bioavailability)
    jump_grad: Array  # (p,) derivative of the jump
    rate_change: float  # change of infusion input into `state`
    rate_grad: Array  # (p,)
    lag_index: int | None
    segment: int = 0
    past: bool = False  # from a steady-state regimen's explicit past pulse


def pulse_events(model: Model, pulses: Sequence[Pulse], theta: Array) -> list[Event]:
    """The events of ``pulses`` at ``theta``, sorted by time (stable)."""
    p = model.n_params
    out: list[Event] = []
    zero = np.zeros(p)
    for d in pulses:
        entry = model.routes[d.route]
        F = float(entry.bioavailability(*theta).reshape(-1)[0])
        dF = entry.bioavailability_grad(*theta).reshape(-1)
        lag = float(theta[entry.lag_index]) if entry.lag_index is not None else 0.0
        t0 = float(d.time) + lag
        if t0 < 0 and not d.past:
            raise UsageError("dose times (after any lag) must be ≥ 0")
        if d.duration > 0:
            out.append(Event(t0, entry.state_index, 0.0, zero, d.rate * F, d.rate * dF, entry.lag_index,
                             d.segment, d.past))
            out.append(Event(t0 + d.duration, entry.state_index, 0.0, zero, -d.rate * F, -d.rate * dF,
                             entry.lag_index, d.segment, d.past))
        else:
            out.append(Event(t0, entry.state_index, d.amount * F, d.amount * dF, 0.0, zero, entry.lag_index,
                             d.segment, d.past))
    out.sort(key=lambda e: e.time)
    return out


class Propagator(Protocol):
    """Advance states over a stretch without events."""

    def __call__(self, x: Array, S: Array | None, u: Array, uS: Array, start: float, taus: Array
                 ) -> tuple[Array, Array | None]:
        """States (k, n) and sensitivities (k, n, p) at offsets ``taus`` (sorted, ≥ 0, h) from
        ``x``, ``S`` at time ``start`` under the constant inputs ``u`` (n,) with sensitivities
        ``uS`` (n, p)."""
        ...


def apply_events(model: Model, theta: Array, x: Array, S: Array | None, u: Array, uS: Array,
                 evs: Sequence[Event]) -> tuple[Array, Array | None, Array, Array]:
    """Apply the events at one time: jumps in states, changes in inputs, lag sensitivities."""
    x, u, uS = x.copy(), u.copy(), uS.copy()
    S = None if S is None else S.copy()
    for e in evs:
        x_before, u_before = x.copy(), u.copy()
        x[e.state] += e.jump
        u[e.state] += e.rate_change
        uS[e.state] += e.rate_grad
        if S is not None:
            S[e.state, : e.jump_grad.size] += e.jump_grad
            if e.lag_index is not None:
                f_before = model.rhs(x_before, theta) + u_before
                f_after = model.rhs(x, theta) + u
                S[:, e.lag_index] += f_before - f_after
    return x, S, u, uS


def _cuts(start: float, events: Sequence[Event]) -> list[tuple[float, list[Event]]]:
    """Distinct event times from ``start``: (time, events there); the first cut holds no events
    so that samples at ``start`` see the state before any event there (pre-dose)."""
    cuts: list[tuple[float, list[Event]]] = [(start, [])]
    for e in events:
        if cuts[-1][1] and cuts[-1][0] == e.time:
            cuts[-1][1].append(e)
        else:
            cuts.append((e.time, [e]))
    return cuts


def step(model: Model, theta: Array, propagate: Propagator, x: Array, S: Array | None, u: Array,
         uS: Array, events: Sequence[Event], start: float, ts: Array, stop: float | None = None
         ) -> tuple[Array, Array | None, Array, Array | None, Array, Array]:
    """Carry the state from ``start`` through ``events`` (sorted, times in [start, stop)).

    Returns the states at the sorted sample times ``ts`` (in [start, stop]; a sample at an
    event's time is taken before it), their sensitivities, and the state, sensitivities
    and inputs at ``stop`` (default: the last sample time), before any event there.
    """
    end = float(stop) if stop is not None else (float(ts[-1]) if ts.size else start)
    X = np.zeros((ts.size, x.size))
    S_out = None if S is None else np.zeros((ts.size,) + S.shape)
    cuts = _cuts(start, [e for e in events if e.time < end])
    bounds = [c[0] for c in cuts[1:]] + [end]
    k = 0
    for (a, evs), b in zip(cuts, bounds, strict=True):
        x, S, u, uS = apply_events(model, theta, x, S, u, uS, evs)
        hi = int(np.searchsorted(ts, b, side="right"))
        Xs, Ss = propagate(x, S, u, uS, a, np.append(ts[k:hi] - a, b - a))
        X[k:hi] = Xs[:-1]
        x = Xs[-1].copy()
        if S_out is not None and Ss is not None:
            S_out[k:hi] = Ss[:-1]
            S = Ss[-1].copy()
        k = hi
    return X, S_out, x, S, u, uS


def solve(model: Model, theta: Array, schedule: Schedule, t: Array, sens: bool, propagate: Propagator,
          periodic_state: Callable[[Segment], tuple[Array, Array, Array, Array]]
          ) -> tuple[Array, Array | None]:
    """States (T, n) and sensitivities (T, n, p) at ``t`` under ``schedule``.

    ``periodic_state(segment)`` returns ``(x, S, u, uS)`` just before the record of a
    steady-state segment (see :mod:`.periodic`).
    """
    n, p = model.n_states, model.n_params
    X = np.zeros((t.size, n))
    S_out = np.zeros((t.size, n, p)) if sens else None
    order = np.argsort(t, kind="stable")
    ts = t[order]
    events = pulse_events(model, schedule.pulses, theta)
    segs = schedule.segments
    for g, seg in enumerate(segs):
        lo = int(np.searchsorted(ts, seg.start, side="left")) if g else 0
        hi = int(np.searchsorted(ts, segs[g + 1].start, side="left")) if g + 1 < len(segs) else ts.size
        if hi <= lo:
            continue
        if seg.regimen is None:
            x = model.initial(theta)
            S = model.initial_jac(theta).reshape(n, p) if sens else None
            u, uS = np.zeros(n), np.zeros((n, p))
        else:
            x, S_ss, u, uS = periodic_state(seg)
            S = S_ss if sens else None
        mine = [e for e in events if e.segment == g and e.time >= seg.start]
        Xg, Sg, *_ = step(model, theta, propagate, x, S, u, uS, mine, seg.start, ts[lo:hi])
        X[order[lo:hi]] = Xg
        if S_out is not None and Sg is not None:
            S_out[order[lo:hi]] = Sg
    return X, S_out
