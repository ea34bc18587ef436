"""Dose records and regimens.

A :class:`Dose` is one dose record: a bolus (``route="iv"``), an oral dose into the
absorption depot (``route="oral"``) or a zero-order infusion (``route="infusion"``,
with ``duration`` or ``rate``). Which state a route enters is declared by the template.

A record may stand for more than one administration, as dose records are kept in
practice:

``additional=n`` with ``interval=τ``
    n more doses of the same amount, route and duration every τ hours after this one
    (n + 1 in all). They are simulated exactly, as if listed one by one
    (:meth:`Dose.expanded`).
``steady_state=True`` with ``interval=τ``
    The subject has taken this amount, by this route and duration, every τ hours long
    enough to be at steady state when this dose is given: the amounts in the model just
    before the record's time are those of the periodic steady state of that regimen, and
    this record's dose (and its additional doses, if any) follow.

**Earlier records at a steady-state record.** A steady-state record *replaces* the state
built by the records before it: from its time on, the model holds the periodic steady
state of its regimen, and nothing from earlier records (doses, infusions still running,
lagged doses not yet absorbed, additional doses they scheduled after this time) nor the
initial conditions contributes any more. Records at the same time or later add to it as
usual. The reasons: the record says the subject has been on this regimen for a long
time, so the regimen's past doses are already in that state, and data often list some of
them as well; adding the earlier records on top would count those doses twice. A rule
that adds would also be exact only for linear models. Two steady-state records at the
same time are refused (which one holds would be ambiguous). A sample taken at the
record's time is a pre-dose sample: it sees the steady state (the trough of a bolus
regimen without lag).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

from .errors import UsageError

ROUTES = ("iv", "oral", "infusion")
#: A dose whose route the data do not state: it enters the model's only bolus-type input
#: (``oral`` for an oral template, ``iv`` for an intravenous one); ambiguous otherwise.
AUTO = "auto"


@dataclass(frozen=True)
class Dose:
    """One dose record.

    Parameters
    ----------
    time : float, h
        Time of the dose (start of an infusion).
    amount : float, dose unit
        Amount given (for an infusion, the total amount).
    route : {"iv", "oral", "infusion", "auto"}
        ``"auto"``: the data do not say; the dose enters the model's only bolus-type
        input (see :func:`resolve_route`).
    duration : float, h, optional
        Infusion duration. Give ``duration`` or ``rate`` for an infusion.
    rate : float, dose unit/h, optional
        Infusion rate.
    interval : float, h, optional
        Dosing interval τ of the regimen this record belongs to; needed by
        ``additional`` and ``steady_state``.
    additional : int
        Number of further doses, each ``interval`` hours after the one before
        (0: this dose only).
    steady_state : bool
        The subject was at the periodic steady state of this regimen (this amount,
        route and duration every ``interval`` hours) just before this dose; see the
        module notes for what happens to earlier records.

    Examples
    --------
    >>> Dose(0.0, 100.0, "infusion", duration=2.0).infusion_rate
    50.0
    >>> [d.time for d in Dose(0.0, 50.0, "oral", interval=12.0, additional=2).expanded()]
    [0.0, 12.0, 24.0]
    """

    time: float
    amount: float
    route: str = "iv"
    duration: float | None = None
    rate: float | None = None
    interval: float | None = None
    additional: int = 0
    steady_state: bool = False

    def __post_init__(self) -> None:
        if self.route not in ROUTES and self.route != AUTO:
            raise UsageError(
                f"unknown route {self.route!r}; use one of {', '.join(ROUTES)}"
            )
        if not (math.isfinite(self.time) and math.isfinite(self.amount)):
            raise UsageError(f"dose time and amount must be finite numbers, got {self.time}, {self.amount}")
        if self.amount < 0:
            raise UsageError(f"dose amount {self.amount} is negative")
        if self.route == "infusion":
            d, r = self.duration, self.rate
            if d is None and r is None:
                raise UsageError("an infusion needs a duration or a rate")
            if d is not None and not (d > 0 and math.isfinite(d)):
                raise UsageError(f"infusion duration {d} must be a positive number")
            if r is not None and not (r > 0 and math.isfinite(r)):
                raise UsageError(f"infusion rate {r} must be a positive number")
        self._check_regimen()

    def _check_regimen(self) -> None:
        """Validate (and normalise) ``interval``, ``additional`` and ``steady_state``."""
        tau = self.interval
        if tau is not None:
            try:
                ok = float(tau) > 0 and math.isfinite(float(tau))
            except (TypeError, ValueError):
                ok = False
            if not ok:
                raise UsageError(f"dose interval {tau!r} must be a positive number of hours")
            object.__setattr__(self, "interval", float(tau))
        n = self.additional
        try:
            whole = float(n) == int(n) and int(n) >= 0 and not isinstance(n, bool)
        except (TypeError, ValueError, OverflowError):
            whole = False
        if not whole:
            raise UsageError(f"additional = {n!r} must be a whole number of further doses (0 or more)")
        object.__setattr__(self, "additional", int(n))
        if self.steady_state not in (True, False):  # also accepts 0/1 and numpy booleans
            raise UsageError(f"steady_state = {self.steady_state!r} must be true or false")
        object.__setattr__(self, "steady_state", bool(self.steady_state))
        if self.additional and tau is None:
            raise UsageError(f"{self.additional} additional doses need the interval between doses: "
                             "give interval= in hours")
        if self.steady_state and tau is None:
            raise UsageError("a steady-state dose needs the dosing interval of its regimen: "
                             "give interval= in hours")

    @property
    def infusion_duration(self) -> float:
        """Duration of an infusion in hours (0 for a bolus or oral dose)."""
        if self.route != "infusion":
            return 0.0
        if self.duration is not None:
            return float(self.duration)
        return float(self.amount / self.rate)  # type: ignore[operator]

    @property
    def infusion_rate(self) -> float:
        """Rate of an infusion in amount per hour (0 for a bolus or oral dose)."""
        if self.route != "infusion":
            return 0.0
        if self.rate is not None:
            return float(self.rate)
        return float(self.amount / self.duration)  # type: ignore[operator]

    def expanded(self) -> list[Dose]:
        """This record's administrations one by one: the dose and its additional doses
        (each without ``additional``; ``steady_state`` and ``interval`` stay on the first).

        The steady-state history before the record cannot be listed; simulation solves it.
        """
        first = replace(self, additional=0)
        rest = [replace(self, time=self.time + k * self.interval, additional=0, steady_state=False,  # type: ignore[operator]
                        interval=None) for k in range(1, self.additional + 1)]
        return [first, *rest]

    def in_time_unit(self, factor: float) -> Dose:
        """The same record on another time axis (times, durations and the interval multiplied
        by ``factor``, rates divided by it)."""
        return replace(self, time=self.time * factor,
                       duration=None if self.duration is None else self.duration * factor,
                       rate=None if self.rate is None else self.rate / factor,
                       interval=None if self.interval is None else self.interval * factor)


def regimen(
    amount: float,
    every: float,
    count: int,
    route: str = "iv",
    start: float = 0.0,
    duration: float | None = None,
) -> list[Dose]:
    """Doses of equal size at equal intervals.

    Parameters
    ----------
    amount : float
        Amount per dose.
    every : float, h
        Dosing interval tau.
    count : int
        Number of doses.
    route : str
    start : float, h
        Time of the first dose.
    duration : float, h, optional
        Infusion duration when ``route="infusion"``.

    Examples
    --------
    >>> [d.time for d in regimen(100, every=12, count=3)]
    [0.0, 12.0, 24.0]
    """
    if count < 1:
        raise UsageError(f"a regimen needs at least one dose, got count={count}")
    if not every > 0:
        raise UsageError(f"dosing interval must be positive, got {every}")
    return [
        Dose(start + i * every, amount, route, duration=duration) for i in range(int(count))
    ]


def resolve_route(route: str, accepted: tuple[str, ...], model_name: str) -> str:
    """The route a dose takes in a model that accepts ``accepted`` routes.

    ``"auto"`` resolves to the single non-infusion route of the model; an infusion may
    enter through the ``iv`` input when the model has no separate infusion input.

    >>> resolve_route("auto", ("oral",), "one-comp-oral")
    'oral'
    """
    if route == AUTO:
        bolus = [r for r in accepted if r != "infusion"]
        if len(bolus) == 1:
            return bolus[0]
        raise UsageError(
            f"the data do not say how the dose was given and template {model_name!r} accepts "
            f"{', '.join(accepted) or 'no doses'}; give the route (command line: --route)"
        )
    if route in accepted:
        return route
    if route == "infusion" and "iv" in accepted:
        return "iv"
    raise UsageError(
        f"template {model_name!r} has no {route!r} dose input; it accepts: "
        f"{', '.join(accepted) or 'none (this model takes no doses)'}"
    )
