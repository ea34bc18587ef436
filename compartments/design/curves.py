"""Predictions and exact parameter sensitivities of the observed outputs over a window.

The sensitivities come from :func:`compartments.simulate.simulate` with
``sensitivities=True`` (exact: the augmented matrix exponential for linear models, the
forward sensitivity equations for nonlinear ones). A design search evaluates thousands of
candidate schedules, so the outputs are computed once on a dense grid and joined by cubic
splines between dose events (where they may jump or kink); a design's reported numbers are
computed again, exactly, at its own times.

Numerics only: no I/O and no presentation.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.interpolate import CubicSpline, PPoly

from ..dosing import Dose, resolve_route
from ..model import Model
from ..simulate import simulate

Array = NDArray[np.float64]

__all__ = ["Curves", "build_curves", "dose_events", "exact_outputs"]

#: Grid points across the window (at least ``MIN_PER_PIECE`` between two dose events).
GRID_POINTS = 1500
MIN_PER_PIECE = 40


def dose_events(model: Model, doses: Sequence[Dose], theta: Array) -> list[float]:
    """Times at which an input starts, stops or jumps (after any lag)."""
    out: set[float] = set()
    for d in doses:
        route = resolve_route(d.route, tuple(model.routes), model.template.name)
        entry = model.routes[route]
        start = float(d.time) + (float(theta[entry.lag_index]) if entry.lag_index is not None else 0.0)
        out.add(start)
        if d.route == "infusion":
            out.add(start + d.infusion_duration)
    return sorted(out)


def exact_outputs(model: Model, theta: Array, doses: Sequence[Dose], times: Array,
                  observed: Sequence[int], estimated: Sequence[int]) -> tuple[Array, Array]:
    """Predictions (T, m) and sensitivities (T, m, p) at ``times``, exactly."""
    t = np.asarray(times, dtype=float).reshape(-1)
    with np.errstate(all="ignore"):
        r = simulate(model, theta, doses, t, sensitivities=True)
    S = r.observable_sensitivities
    assert S is not None
    return r.observables[:, list(observed)], S[:, list(observed), :][:, :, list(estimated)]


@dataclass(frozen=True)
class Curves:
    """Outputs on a grid over the window and splines through them.

    Attributes
    ----------
    theta : (P,) array
        All parameter values.
    grid : (G,) array
        Grid times (a time at a dose event holds the value just after it).
    f : (G, m) array
    J : (G, m, p) array
    """

    theta: Array
    grid: Array
    f: Array
    J: Array
    _spline: PPoly

    def at(self, times: Array) -> tuple[Array, Array]:
        """Spline values: predictions (..., m) and sensitivities (..., m, p)."""
        t = np.asarray(times, dtype=float)
        m, p = self.J.shape[1:]
        v = self._spline(t.reshape(-1)).reshape(t.shape + (m * (p + 1),))
        return v[..., :m], v[..., m:].reshape(t.shape + (m, p))


def build_curves(model: Model, theta: Array, doses: Sequence[Dose], window: tuple[float, float],
                 observed: Sequence[int], estimated: Sequence[int], points: int = GRID_POINTS) -> Curves:
    """Exact outputs on a dense grid over ``window`` and cubic splines between dose events."""
    lo, hi = window
    cuts = [lo] + [e for e in dose_events(model, doses, theta) if lo < e < hi] + [hi]
    span = hi - lo
    pieces = []
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        k = max(MIN_PER_PIECE, int(round(points * (b - a) / span)))
        pieces.append(np.linspace(a, b, k + 1))
    nudge = [np.r_[x[0] + 1e-9 * max(1.0, abs(x[0])), x[1:]] for x in pieces]  # just after an event
    all_times = np.concatenate(nudge)
    f, J = exact_outputs(model, theta, doses, all_times, observed, estimated)
    m, p = J.shape[1:]
    values = np.concatenate([f, J.reshape(len(all_times), m * p)], axis=1)
    xs, cs, start = [], [], 0
    for i, x in enumerate(pieces):
        v = values[start:start + len(x)]
        start += len(x)
        cs.append(CubicSpline(x, v, axis=0).c)
        xs.append(x if i == 0 else x[1:])
    spline = PPoly(np.concatenate(cs, axis=1), np.concatenate(xs), extrapolate=True)
    return Curves(theta=np.asarray(theta, dtype=float), grid=all_times, f=f, J=J, _spline=spline)
