"""Dose events and regimens.

A :class:`Dose` is one administration: a bolus (``route="iv"``), an oral dose into the
absorption depot (``route="oral"``) or a zero-order infusion (``route="infusion"``,
with ``duration`` or ``rate``). Which state a route enters is declared by the template.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .errors import UsageError

ROUTES = ("iv", "oral", "infusion")
#: A dose whose route the data do not state: it enters the model's only bolus-type input
#: (``oral`` for an oral template, ``iv`` for an intravenous one); ambiguous otherwise.
AUTO = "auto"


@dataclass(frozen=True)
class Dose:
    """One administration.

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

    Examples
    --------
    >>> Dose(0.0, 100.0, "infusion", duration=2.0).infusion_rate
    50.0
    """

    time: float
    amount: float
    route: str = "iv"
    duration: float | None = None
    rate: float | None = None

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
