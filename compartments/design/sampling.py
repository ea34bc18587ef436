"""Optimal sampling times: when to sample so that the parameters are estimated best.

:func:`design_samples` maximises a criterion of the Fisher information
(:mod:`~compartments.design.fisher` for one subject,
:mod:`~compartments.design.population_design` for N subjects) built from the exact
parameter sensitivities of the template, over sampling times in a window (or a list of
allowed times), with a least spacing and replicate measurements; it searches from several
global starts (:mod:`~compartments.design.search`) and checks the result by the general
equivalence theorem (:mod:`~compartments.design.equivalence`). With a prior (parameter
uncertainty as log-normal spreads) the criterion is the mean over draws from it
(ED-optimality; Pronzato & Walter 1985, Math Biosci 75:103).

The design depends on the parameter values assumed: it is a plan for a study, to be
checked against what is known, not a result.

Numerics only: no I/O and no presentation.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..dosing import Dose, resolve_route
from ..errors import UsageError
from ..model import compiled
from ..template import Template
from .criteria import criterion as make_criterion
from .curves import dose_events
from .equivalence import EquivalenceCheck, check_equivalence
from .fisher import ResidualError, resolve_error, sample_information
from .population_design import Variability
from .problem import DesignProblem
from .search import continuous_search, discrete_search

Array = NDArray[np.float64]

__all__ = ["DesignGroup", "SamplingDesign", "design_samples"]

#: Most samples per subject a design may place.
MAX_SAMPLES = 50
#: Most draws from a prior.
MAX_DRAWS = 1000


@dataclass(frozen=True)
class DesignGroup:
    """Subjects sampled at the same times."""

    subjects: int
    times: tuple[float, ...]
    replicates: tuple[int, ...]

    def to_dict(self) -> dict[str, Any]:
        return {"subjects": self.subjects, "times": list(self.times), "replicates": list(self.replicates)}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> DesignGroup:
        return cls(int(d["subjects"]), tuple(float(t) for t in d["times"]), tuple(int(r) for r in d["replicates"]))


@dataclass(frozen=True)
class SamplingDesign:
    """An optimal sampling design and what it is expected to deliver.

    Attributes
    ----------
    template, time_unit : str
    criterion : str
        E.g. ``"D"``, ``"A"``, ``"Ds (ka)"``; robust designs add the number of draws.
    population : bool
        N subjects with between-subject variability (else one subject).
    groups : tuple of DesignGroup
    parameters : tuple of str
        The estimated parameters.
    values : dict of str to float
        Every parameter value assumed.
    observed : tuple of str
    error : ResidualError
    variability : dict of str to float
        SD of the log (about the CV) between subjects, per parameter (population).
    prior : dict of str to float
        SD of the log of the parameter uncertainty (robust designs); ``draws`` from it.
    expected_rse : dict of str to float, %
        Expected relative standard error of each estimated parameter (its typical value in
        a population design).
    expected_rse_variance, expected_rse_error : dict of str to float, %
        Population designs: of the between-subject variances and of the error parameters.
    value : float
        The criterion value (exact, at the design's times).
    equivalence : EquivalenceCheck
    search : dict
        Method, starts and how many reached the best value.
    window : (float, float)
    min_spacing : float
    allowed : tuple of float or None
    doses : tuple of dict
    curve : dict
        Nominal predictions on the grid (``time``, ``prediction`` by observable).
    sensitivity : dict
        The sensitivity function on the grid (one subject: ``value``; population:
        ``slices``, each sample moved alone) and its ``bound``.
    notes : tuple of str
    seconds : float
    """

    template: str
    time_unit: str
    criterion: str
    population: bool
    groups: tuple[DesignGroup, ...]
    parameters: tuple[str, ...]
    values: Mapping[str, float]
    observed: tuple[str, ...]
    error: ResidualError
    variability: Mapping[str, float]
    prior: Mapping[str, float]
    draws: int
    expected_rse: Mapping[str, float]
    expected_rse_variance: Mapping[str, float]
    expected_rse_error: Mapping[str, float]
    value: float
    equivalence: EquivalenceCheck
    search: Mapping[str, Any]
    window: tuple[float, float]
    min_spacing: float
    allowed: tuple[float, ...] | None
    doses: tuple[Mapping[str, Any], ...]
    curve: Mapping[str, Any]
    sensitivity: Mapping[str, Any]
    units: Mapping[str, str] = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    seconds: float = 0.0
    _problem: DesignProblem | None = field(default=None, compare=False, repr=False)

    @property
    def times(self) -> Array:
        """The sorted sample times (one group; see ``groups`` otherwise)."""
        if len(self.groups) != 1:
            raise UsageError(f"this design has {len(self.groups)} groups with their own times; see .groups")
        return np.array(self.groups[0].times)

    def efficiency(self, times: Sequence[float] | Sequence[Sequence[float]]) -> float:
        """Efficiency of another schedule relative to this design (same subjects, doses
        and assumptions): for D-optimality ``(det M_other / det M_this)^(1/P)``.

        ``times`` is one list of times, or one list per group. Values above 1 mean the
        other schedule is better (e.g. it has more samples).
        """
        if self._problem is None:
            raise UsageError("efficiency() needs the design as computed by design_samples(), not one read back")
        problem = self._problem
        if len(self.groups) == 1 and (len(times) == 0 or np.ndim(times[0]) == 0):
            blocks = [list(times)]
        else:
            blocks = [list(b) for b in times]  # type: ignore[arg-type]
        if len(blocks) != len(self.groups):
            raise UsageError(f"give one list of times per group ({len(self.groups)})")
        x = []
        for b in blocks:
            for t in b:
                try:
                    v = float(t)
                except (TypeError, ValueError):
                    raise UsageError(f"sample time {t!r} is not a number") from None
                if not (math.isfinite(v) and v >= 0):
                    raise UsageError(f"sample time {t!r} must be a finite number ≥ 0")
                x.append(v)
            if not b:
                raise UsageError("a compared schedule needs at least one time")
        other = replace(problem, layout=tuple(len(b) for b in blocks),
                        replicates=tuple(np.ones(len(b)) for b in blocks))
        value = other.exact_value(np.array(x))
        if not math.isfinite(value):
            return 0.0
        return problem.criterion.efficiency(value, self.value, problem.size)

    def to_dict(self) -> dict[str, Any]:
        """Plain data (JSON-ready)."""
        return {
            "template": self.template, "time_unit": self.time_unit, "criterion": self.criterion,
            "population": self.population, "groups": [g.to_dict() for g in self.groups],
            "parameters": list(self.parameters), "values": dict(self.values), "observed": list(self.observed),
            "error": self.error.to_dict(), "variability": dict(self.variability), "prior": dict(self.prior),
            "draws": self.draws, "expected_rse": _finite(self.expected_rse),
            "expected_rse_variance": _finite(self.expected_rse_variance),
            "expected_rse_error": _finite(self.expected_rse_error), "value": self.value,
            "equivalence": self.equivalence.to_dict(), "search": dict(self.search),
            "window": list(self.window), "min_spacing": self.min_spacing,
            "allowed": None if self.allowed is None else list(self.allowed), "doses": [dict(d) for d in self.doses],
            "curve": dict(self.curve), "sensitivity": dict(self.sensitivity), "units": dict(self.units),
            "notes": list(self.notes), "seconds": self.seconds,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SamplingDesign:
        """Inverse of :meth:`to_dict` (without the problem: ``efficiency`` is not available)."""
        return cls(
            template=d["template"], time_unit=d["time_unit"], criterion=d["criterion"],
            population=bool(d["population"]), groups=tuple(DesignGroup.from_dict(g) for g in d["groups"]),
            parameters=tuple(d["parameters"]), values=dict(d["values"]), observed=tuple(d["observed"]),
            error=ResidualError.from_dict(d["error"]), variability=dict(d["variability"]), prior=dict(d["prior"]),
            draws=int(d["draws"]), expected_rse=_infinite(d["expected_rse"]),
            expected_rse_variance=_infinite(d["expected_rse_variance"]),
            expected_rse_error=_infinite(d["expected_rse_error"]),
            value=float(d["value"]), equivalence=EquivalenceCheck.from_dict(d["equivalence"]),
            search=dict(d["search"]), window=(float(d["window"][0]), float(d["window"][1])),
            min_spacing=float(d["min_spacing"]), allowed=None if d["allowed"] is None else tuple(d["allowed"]),
            doses=tuple(dict(x) for x in d["doses"]), curve=dict(d["curve"]), sensitivity=dict(d["sensitivity"]),
            units=dict(d.get("units", {})), notes=tuple(d.get("notes", ())), seconds=float(d.get("seconds", 0.0)),
        )


def _finite(values: Mapping[str, float]) -> dict[str, float | None]:
    """For JSON: an infinite relative standard error (singular information) as None."""
    return {k: (float(v) if math.isfinite(v) else None) for k, v in values.items()}


def _infinite(values: Mapping[str, float | None]) -> dict[str, float]:
    return {k: (math.inf if v is None else float(v)) for k, v in values.items()}


# ---------------------------------------------------------------------- validation
def _number(value: Any, what: str, positive: bool = False, whole: bool = False) -> float:
    if isinstance(value, bool):
        raise UsageError(f"{what}={value!r} is not a number")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise UsageError(f"{what}={value!r} is not a number") from None
    if not math.isfinite(v) or (positive and v <= 0) or v < 0:
        raise UsageError(f"{what}={value!r} must be a finite number{' > 0' if positive else ' ≥ 0'}")
    if whole and v != int(v):
        raise UsageError(f"{what}={value!r} must be a whole number")
    return v


def _window(window: Any) -> tuple[float, float]:
    try:
        lo, hi = window
    except (TypeError, ValueError):
        raise UsageError(f"window={window!r}: give (start, end), e.g. (0, 24)") from None
    lo, hi = _number(lo, "window start"), _number(hi, "window end")
    if not hi > lo:
        raise UsageError(f"window=({lo:g}, {hi:g}): the end must come after the start")
    return lo, hi


def _parameters(template: Template, values: Mapping[str, float] | None, fixed: Mapping[str, float] | None,
                estimate: Sequence[str] | None) -> tuple[dict[str, float], list[str]]:
    names = template.parameter_names
    out = {p.name: float(p.default) for p in template.parameters}
    for what, given in (("values", values or {}), ("fixed", fixed or {})):
        for k, v in given.items():
            if k not in names:
                raise UsageError(f"{what}={{{k!r}: ...}}: not a parameter of {template.name!r}; it has {', '.join(names)}")
            out[k] = _number(v, f"{what}[{k!r}]") if template.parameter(k).lower >= 0 else float(v)
    for k in estimate or ():
        if k not in names:
            raise UsageError(f"estimate={k!r}: not a parameter of {template.name!r}; it has {', '.join(names)}")
        if k in (fixed or {}):
            raise UsageError(f"{k!r} is both in estimate= and fixed=")
    free = [p.name for p in template.parameters
            if (not p.fixed or p.name in (estimate or ())) and p.name not in (fixed or {})]
    if not free:
        raise UsageError("no parameter is left to estimate; remove one from fixed=")
    return out, free


def _default_doses(template: Template) -> list[Dose]:
    if not template.doses:
        return []
    bolus = [r for r in template.doses if r != "infusion"]
    if len(bolus) == 1:
        return [Dose(0.0, 1.0, bolus[0])]
    raise UsageError(f"template {template.name!r} accepts {', '.join(template.doses)} doses; give doses= "
                     "(e.g. [Dose(time=0, amount=100, route='iv')])")


def _groups(n: int | None, subjects: int | None, groups: Sequence[Sequence[int]] | None
            ) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """(samples per group, subjects per group)."""
    if groups is not None:
        layout, counts = [], []
        for g in groups:
            try:
                s, k = g
            except (TypeError, ValueError):
                raise UsageError(f"groups= entry {g!r}: give (subjects, samples), e.g. (30, 3)") from None
            counts.append(int(_number(s, "subjects in a group", positive=True, whole=True)))
            layout.append(int(_number(k, "samples in a group", positive=True, whole=True)))
        if not layout:
            raise UsageError("groups= is empty")
        if subjects is not None and int(subjects) != sum(counts):
            raise UsageError(f"subjects={subjects} but the groups hold {sum(counts)} subjects")
        return tuple(layout), tuple(counts)
    if n is None:
        raise UsageError("give n= (samples per subject)")
    k = int(_number(n, "n", positive=True, whole=True))
    s = 1 if subjects is None else int(_number(subjects, "subjects", positive=True, whole=True))
    return (k,), (s,)


def _replicates(replicates: int | Sequence[int], layout: tuple[int, ...]) -> tuple[Array, ...]:
    if np.ndim(replicates) == 0:
        r = int(_number(replicates, "replicates", positive=True, whole=True))
        return tuple(np.full(n, float(r)) for n in layout)
    if len(layout) != 1 or len(replicates) != layout[0]:  # type: ignore[arg-type]
        raise UsageError("replicates= as a list needs one count per sample of a single group")
    return (np.array([_number(r, "replicates", positive=True, whole=True) for r in replicates]),)  # type: ignore[union-attr]


def _draws(prior: Mapping[str, float] | None, values: dict[str, float], names: Sequence[str], draws: int,
           seed: int) -> Array:
    nominal = np.array([values[n] for n in names])
    if not prior:
        return nominal[None, :]
    k = int(_number(draws, "draws", positive=True, whole=True))
    if not 2 <= k <= MAX_DRAWS:
        raise UsageError(f"draws={draws} must be between 2 and {MAX_DRAWS}")
    sd = np.zeros(len(names))
    for n, v in prior.items():
        if n not in names:
            raise UsageError(f"prior={{{n!r}: ...}}: not a parameter; the template has {', '.join(names)}")
        sd[names.index(n)] = _number(v, f"prior[{n!r}]", positive=True)
    z = np.random.default_rng(seed).standard_normal((k, len(names)))
    return nominal * np.exp(sd * z)


# ---------------------------------------------------------------------- the design
def design_samples(
    template: Template,
    values: Mapping[str, float] | None = None,
    *,
    fixed: Mapping[str, float] | None = None,
    estimate: Sequence[str] | None = None,
    doses: Sequence[Dose] | None = None,
    n: int | None = None,
    window: tuple[float, float] = (0.0, 24.0),
    error: Any = "additive",
    sd: float | Mapping[str, float] | None = None,
    cv: float | Mapping[str, float] | None = None,
    observed: Sequence[str] | None = None,
    criterion: Any = "D",
    interest: Sequence[str] | None = None,
    min_spacing: float = 0.0,
    allowed: Sequence[float] | None = None,
    replicates: int | Sequence[int] = 1,
    subjects: int | None = None,
    variability: Mapping[str, float] | None = None,
    groups: Sequence[Sequence[int]] | None = None,
    prior: Mapping[str, float] | None = None,
    draws: int = 30,
    starts: int = 8,
    seed: int = 0,
) -> SamplingDesign:
    """Optimal sampling times for a template (method: see the module docstring).

    Parameters
    ----------
    template : Template
    values : mapping of str to float
        Assumed values of the parameters (the others take the template defaults).
    fixed : mapping of str to float
        Parameters held known at these values (not estimated).
    estimate : sequence of str
        Parameters the template holds fixed (e.g. ``tlag``) to estimate as well.
    doses : sequence of Dose
        Default: one dose of 1 (dose unit) at time 0 by the template's only bolus route.
    n : int
        Samples per subject (one group).
    window : (float, float), template time unit
        Earliest and latest sampling time.
    error : {"additive", "proportional", "combined", "lognormal"} or an error-model object
    sd, cv : float or mapping by observable
        Error sizes (default: SD 10% of the largest prediction; CV 10%).
    observed : sequence of str
        Observables measured at every sample (default: all).
    criterion : {"D", "A", "Ds"} or a Criterion
    interest : sequence of str
        The parameters that matter, for ``"Ds"``.
    min_spacing : float, template time unit
        Least time between two samples of one subject.
    allowed : sequence of float
        Only these times may be chosen (e.g. clinic hours), distinct within a subject.
    replicates : int or sequence of int
        Measurements at each sample time.
    subjects : int
        A population design for this many subjects (with ``variability``).
    variability : mapping of str to float
        Between-subject SD of the log of a parameter (about its CV), per parameter.
    groups : sequence of (subjects, samples)
        A population design in groups with their own times.
    prior : mapping of str to float
        Uncertainty of parameters as the SD of their log: a robust (ED-optimal) design,
        the criterion averaged over ``draws`` draws (seeded).
    starts : int
        Local starts besides differential evolution.
    seed : int

    Returns
    -------
    SamplingDesign

    Examples
    --------
    The D-optimal two-point design of Box & Lucas (1959) for ka = 0.7, ke = 0.2:

    >>> from compartments import load_template, Dose
    >>> d = design_samples(load_template("one-comp-oral"), values={"ka": 0.7, "ke": 0.2}, fixed={"V": 1.0},
    ...                    doses=[Dose(time=0, amount=1.0, route="oral")], n=2, window=(0, 24))
    >>> d.times.round(2).tolist()
    [1.23, 6.86]
    >>> d.equivalence.holds
    True
    """
    started = time.monotonic()
    problem, setup = _build_problem(template, values, fixed, estimate, doses, n, window, error, sd, cv, observed,
                                    criterion, interest, min_spacing, allowed, replicates, subjects, variability,
                                    groups, prior, draws, seed)
    free, lo, hi = setup["free"], problem.window[0], problem.window[1]
    if setup["allowed"] is not None:
        found = discrete_search(problem.objective, problem.layout, setup["allowed"], problem.spacing, starts, seed)
    else:
        found = continuous_search(problem.objective, problem.layout, lo, hi, problem.spacing, starts, seed)
    value = problem.exact_value(found.x)
    if not math.isfinite(value):
        raise UsageError(f"no schedule of {'/'.join(map(str, problem.layout))} samples in the window can estimate "
                         f"{', '.join(free)}: the information stays singular; add samples, observe more, or fix "
                         "parameters (fixed=)")
    check, sens = check_equivalence(problem, found.x, setup["allowed"], seed)
    return _record(template, problem, setup, found, value, check, sens, time.monotonic() - started)


def _build_problem(template: Template, values: Any, fixed: Any, estimate: Any, doses: Any, n: Any, window: Any,
                   error: Any, sd: Any, cv: Any, observed: Any, criterion: Any, interest: Any, min_spacing: Any,
                   allowed: Any, replicates: Any, subjects: Any, variability: Any, groups: Any, prior: Any,
                   draws: Any, seed: int) -> tuple[DesignProblem, dict[str, Any]]:
    """Validate the arguments (one line each, in keyword words) and set up the problem."""
    values_all, free = _parameters(template, values, fixed, estimate)
    lo, hi = _window(window)
    layout, counts = _groups(n, subjects, groups)
    if max(layout) > MAX_SAMPLES:
        raise UsageError(f"at most {MAX_SAMPLES} samples per subject")
    reps = _replicates(replicates, layout)
    spacing = _number(min_spacing, "min_spacing")
    if any(k * spacing > 0 and (k - 1) * spacing > hi - lo for k in layout):
        raise UsageError(f"{max(layout)} samples at least {spacing:g} apart do not fit in the window {lo:g} to {hi:g}")
    population = subjects is not None or groups is not None
    if variability and not population:
        raise UsageError("variability= needs subjects= (or groups=): it describes a population design")
    model = compiled(template)
    obs_names = template.observable_names if observed is None else (
        (observed,) if isinstance(observed, str) else tuple(observed))
    for o in obs_names:
        if o not in template.observable_names:
            raise UsageError(f"observed={o!r} is not an observable of {template.name!r}; it has "
                             f"{', '.join(template.observable_names)}")
    dose_list = _default_doses(template) if doses is None else list(doses)
    for d in dose_list:
        if not isinstance(d, Dose):
            raise UsageError(f"doses= must hold Dose objects, got {type(d).__name__}")
        resolve_route(d.route, tuple(model.routes), template.name)
    names = list(model.parameter_names)
    nominal = np.array([values_all[k] for k in names])
    cand = _allowed(allowed, lo, hi, layout, spacing)
    notes = []
    start_lo = lo
    if cand is None and any(abs(e - lo) <= 1e-12 * max(1.0, abs(lo)) for e in dose_events(model, dose_list, nominal)):
        start_lo = lo + 1e-3 * (hi - lo)
        notes.append(f"a dose is given at the window start, where a sample would come before it; the earliest "
                     f"time is {start_lo - lo:.3g} {template.time_unit} after it (as soon after the dose as practical)")
    problem = DesignProblem(
        model=model, thetas=_draws(prior, values_all, names, draws, seed), nominal=nominal,
        estimated=tuple(names.index(k) for k in free),
        observed=tuple(template.observable_names.index(o) for o in obs_names), doses=dose_list,
        window=(start_lo, hi), error=ResidualError("additive", (1.0,) * len(obs_names)),
        criterion=make_criterion("D", free, [1.0] * len(free)), layout=layout, subjects=counts, replicates=reps,
        spacing=spacing)
    peak = np.max(np.abs(problem.nominal_curves().f), axis=0)
    problem.error = resolve_error(error, obs_names, peak, sd=sd, cv=cv)
    if problem.error.sd_assumed:
        notes.append("residual SD not given: taken as 10% of the largest prediction ("
                     + ", ".join(f"{o} {v:.3g}" for o, v in zip(obs_names, problem.error.sd, strict=True)) + ")")
    problem.variability = Variability.from_mapping(variability or {}, free) if population else None
    problem.criterion = make_criterion(criterion, _labels(problem, free, obs_names), problem.scale(), interest)
    if not population and layout[0] * len(obs_names) < len(free):
        raise UsageError(f"n={layout[0]} samples of {len(obs_names)} output(s) cannot estimate {len(free)} parameters "
                         f"({', '.join(free)}); take more samples or hold some known (fixed=)")
    _check_information(problem, free)
    setup = {"free": free, "values": values_all, "observed": obs_names, "allowed": cand, "notes": notes,
             "window": (lo, hi), "population": population, "prior": dict(prior or {})}
    return problem, setup


def _record(template: Template, problem: DesignProblem, setup: Mapping[str, Any], found: Any, value: float,
            check: EquivalenceCheck, sens: Mapping[str, Any], seconds: float) -> SamplingDesign:
    """The design record: times, expected precision, the check, the curves for the figure."""
    free, obs_names, cand, bsv = setup["free"], setup["observed"], setup["allowed"], problem.variability
    x = found.x
    rse = _rse(problem.exact_information(x, problem.nominal)[0], problem.scale())
    p, q = len(free), (len(bsv.names) if bsv else 0)
    prior = setup["prior"]
    crit_name = problem.criterion.describe() + (f", expected over {len(problem.thetas)} draws" if prior else "")
    curves = problem.nominal_curves()
    return SamplingDesign(
        template=template.name, time_unit=template.time_unit, criterion=crit_name, population=setup["population"],
        groups=tuple(DesignGroup(problem.subjects[g], tuple(float(t) for t in x[b]),
                                 tuple(int(r) for r in problem.replicates[g]))
                     for g, b in enumerate(problem.blocks())),
        parameters=tuple(free), values=setup["values"], observed=tuple(obs_names), error=problem.error,
        variability=bsv.to_dict() if bsv else {}, prior=prior, draws=len(problem.thetas) if prior else 0,
        expected_rse=dict(zip(free, rse[:p].tolist(), strict=True)),
        expected_rse_variance=dict(zip(bsv.names, rse[p:p + q].tolist(), strict=True)) if bsv else {},
        expected_rse_error=(dict(zip(problem.error.parameter_names(obs_names), rse[p + q:].tolist(), strict=True))
                            if bsv else {}),
        value=value, equivalence=check,
        search={"method": found.method, "starts": found.starts, "agreeing": found.agreeing},
        window=setup["window"], min_spacing=problem.spacing,
        allowed=None if cand is None else tuple(float(c) for c in cand),
        doses=tuple(_dose_dict(d) for d in problem.doses),
        curve={"time": curves.grid.tolist(),
               "prediction": {o: curves.f[:, i].tolist() for i, o in enumerate(obs_names)}},
        sensitivity=sens,
        units={"time": template.time_unit} | {o: template.observable(o).unit for o in obs_names}
        | {k: template.parameter(k).unit for k in problem.model.parameter_names},
        notes=tuple(setup["notes"]), seconds=seconds, _problem=problem,
    )


def _dose_dict(d: Dose) -> dict[str, Any]:
    out: dict[str, Any] = {"time": d.time, "amount": d.amount, "route": d.route}
    if d.route == "infusion":
        out["duration"] = d.infusion_duration
    return out


def _allowed(allowed: Sequence[float] | None, lo: float, hi: float, layout: tuple[int, ...], spacing: float
             ) -> Array | None:
    if allowed is None:
        return None
    cand = np.unique([_number(t, "allowed time") for t in allowed])
    outside = [t for t in cand if not lo <= t <= hi]
    if outside:
        raise UsageError(f"allowed time {outside[0]:g} is outside the window {lo:g} to {hi:g}")
    if len(cand) < max(layout):
        raise UsageError(f"{len(cand)} allowed times cannot hold {max(layout)} distinct samples per subject")
    return cand


def _labels(problem: DesignProblem, free: Sequence[str], observed: Sequence[str]) -> list[str]:
    out = list(free)
    if problem.variability is not None:
        out += [f"variance of {k}" for k in problem.variability.names]
        out += list(problem.error.parameter_names(observed))
    return out


def _rse(M: Array, scale: Array) -> Array:
    """Expected relative standard errors, % (inf where the information is singular)."""
    try:
        cov = np.linalg.inv(M)
    except np.linalg.LinAlgError:
        return np.full(len(scale), math.inf)
    se = np.sqrt(np.clip(np.diag(cov), 0, None))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(scale != 0, 100 * se / np.abs(scale), math.inf)


def _check_information(problem: DesignProblem, free: Sequence[str]) -> None:
    """Refuse, in words, parameters that no sampling time in the window can separate."""
    c = problem.nominal_curves()
    total = sample_information(c.J, c.f, problem.error).sum(axis=0)
    diag = np.diag(total)
    dead = [free[i] for i in range(len(free)) if not diag[i] > 0]
    if dead:
        raise UsageError(f"{', '.join(dead)} {'has' if len(dead) == 1 else 'have'} no effect on the observed outputs "
                         "in the window; fix it (fixed=) or widen the window")
    C = total / np.sqrt(np.outer(diag, diag))
    w, v = np.linalg.eigh(C)
    if w[0] < 1e-10 * w[-1]:
        names = [free[i] for i in np.flatnonzero(np.abs(v[:, 0]) > 0.1)]
        raise UsageError(f"the observed outputs cannot tell {', '.join(names)} apart at any times in the window "
                         "(their sensitivities are proportional); fix one of them (fixed=) or observe more "
                         "(structural identifiability: compartments show NAME --observe ...)")
