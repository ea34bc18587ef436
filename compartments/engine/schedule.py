"""Dose records as the model sees them: pulses in segments.

A :class:`Schedule` is built once per subject and model (routes resolved, additional
doses expanded, steady-state records split into segments); the parameter values enter
later (bioavailability, lag times).

* A **pulse** is one administration: a bolus (``duration`` 0) or an infusion, into one
  route, at a record time before any lag.
* A **segment** starts at time 0 (initial conditions) or at a steady-state record, whose
  time replaces the state built by earlier records (see :mod:`compartments.dosing`).
  Every pulse belongs to one segment and acts only on the samples of its segment: those
  at or after the segment's start and before the next segment's.
* A steady-state segment keeps its **regimen** (amount, route, duration, interval τ) and
  lists the regimen's *past* pulses at ``t₀ − kτ`` for ``k = 1 … K − 1`` explicitly
  (``past=True``), where ``K = ⌊(ℓ + d)/τ⌋ + 1`` for the largest lag ℓ to be simulated
  and the infusion duration d. The pulses ``k ≥ K`` have entered, and ended, before
  ``t₀`` whatever the lag up to ℓ: they form the geometric *tail* that the solvers sum in
  closed form (linear models) or through the periodic state (nonlinear ones).

Examples
--------
>>> from compartments import load_template
>>> from compartments.dosing import Dose
>>> from compartments.model import compiled
>>> m = compiled(load_template("one-comp-iv"))
>>> s = build_schedule(m, [Dose(0, 100), Dose(24, 100, interval=12, steady_state=True)])
>>> [(g.start, g.regimen is not None) for g in s.segments]
[(0.0, False), (24.0, True)]
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from ..dosing import Dose, resolve_route
from ..errors import UsageError
from ..model import Model


@dataclass(frozen=True)
class Pulse:
    """One administration of a schedule.

    Attributes
    ----------
    time : float, h
        Record time (before any lag).
    amount : float, dose unit
    route : str
        The route resolved for the model.
    duration : float, h
        Infusion duration (0 for a bolus or oral dose).
    rate : float, dose unit/h
        Infusion rate (0 for a bolus or oral dose).
    segment : int
    past : bool
        A past dose of a steady-state regimen listed explicitly (before its record).
    """

    time: float
    amount: float
    route: str
    duration: float
    rate: float
    segment: int
    past: bool = False


@dataclass(frozen=True)
class Segment:
    """Samples at or after ``start`` (until the next segment) see only this segment's pulses.

    Attributes
    ----------
    start : float, h
    regimen : Pulse or None
        The steady-state record's own pulse (None for the first segment, which starts from
        the initial conditions).
    interval : float, h
        The regimen's dosing interval τ (0 without a regimen).
    tail_from : int
        ``K``: the pulses ``t₀ − kτ`` with ``k ≥ K`` form the closed-form tail.
    """

    start: float
    regimen: Pulse | None = None
    interval: float = 0.0
    tail_from: int = 0


@dataclass(frozen=True)
class Schedule:
    """Segments and pulses of one subject under one model (pulses sorted by time)."""

    segments: tuple[Segment, ...]
    pulses: tuple[Pulse, ...]

    def segment_of(self, t: float) -> int:
        """Index of the segment a sample at time ``t`` belongs to."""
        k = 0
        for i, g in enumerate(self.segments):
            if g.start <= t:
                k = i
        return k


def lag_bounds(model: Model, theta: Sequence[float] | None = None) -> dict[str, float]:
    """Largest lag (h) per route to plan steady-state tails for: the lag's value in ``theta``,
    or without ``theta`` the upper bound of the template's lag parameter."""
    out: dict[str, float] = {}
    for route, entry in model.routes.items():
        if entry.lag_index is None:
            out[route] = 0.0
        elif theta is not None:
            out[route] = max(0.0, float(theta[entry.lag_index]))
        else:
            out[route] = max(0.0, float(model.template.parameters[entry.lag_index].upper))
    return out


def build_schedule(model: Model, doses: Sequence[Dose], max_lag: Mapping[str, float] | None = None
                   ) -> Schedule:
    """Pulses and segments of ``doses`` under ``model``.

    Parameters
    ----------
    model : Model
    doses : sequence of Dose
    max_lag : mapping route -> float, h, optional
        Largest lag time to be simulated per route (default: :func:`lag_bounds`).

    Raises
    ------
    UsageError
        A route the model does not accept, a negative dose time, two steady-state
        records at one time.
    """
    lags = dict(lag_bounds(model)) if max_lag is None else dict(max_lag)
    name = model.template.name
    records = sorted(doses, key=lambda d: (d.time, not d.steady_state))
    ss_times = [d.time for d in records if d.steady_state]
    if len(set(ss_times)) != len(ss_times):
        t = next(x for x in ss_times if ss_times.count(x) > 1)
        raise UsageError(f"two steady-state dose records at time {t:g}: which regimen holds is ambiguous; "
                         "keep one of them")
    if records and records[0].time < 0:
        raise UsageError(f"dose time {records[0].time:g} is negative; times are hours after the start (≥ 0)")
    segments = [Segment(0.0)]
    pulses: list[Pulse] = []
    for d in records:
        route = resolve_route(d.route, tuple(model.routes), name)
        dur, rate, t_rec, amount = d.infusion_duration, d.infusion_rate, float(d.time), float(d.amount)
        if d.steady_state:
            tau = float(d.interval)  # type: ignore[arg-type]
            K = int(math.floor((lags.get(route, 0.0) + dur) / tau)) + 1
            own = Pulse(t_rec, amount, route, dur, rate, len(segments))
            segments.append(Segment(t_rec, own, tau, K))
            pulses += [Pulse(t_rec - k * tau, amount, route, dur, rate, len(segments) - 1, past=True)
                       for k in range(K - 1, 0, -1)]
        seg = len(segments) - 1
        for k in range(d.additional + 1):
            t = t_rec + k * d.interval if k else t_rec  # type: ignore[operator]
            pulses.append(Pulse(t, amount, route, dur, rate, seg))
    pulses.sort(key=lambda p: (p.time, p.segment))
    return Schedule(tuple(segments), tuple(pulses))
