"""The estimation problem shared by every stage: model, data, free parameters, scales.

A :class:`Problem` fixes which template parameters are estimated (the *free* ones: every
parameter not marked ``fixed`` unless asked otherwise), their bounds, and their working
scale ``φ`` (``log θ`` for log-scaled parameters, ``θ`` otherwise). It flattens one or
more subjects' observations so that a stage can ask for predictions and their exact
Jacobian ``∂f/∂φ`` at any ``φ``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..dosing import Dose
from ..errors import CompartmentsError, FitError, UsageError
from ..model import Model
from ..simulate import simulate
from .likelihood import initial_eta, neg2ll

Array = NDArray[np.float64]

ERROR_MODELS = ("additive", "proportional", "combined", "lognormal")


@dataclass(frozen=True)
class SubjectData:
    """One subject's observations, ready for estimation (times in the model's unit)."""

    id: str
    times: Array
    values: Array
    obs_index: NDArray[np.int64]  # which model observable each row is
    censored: NDArray[np.bool_]
    lloq: Array
    doses: tuple[Dose, ...]

    @property
    def n(self) -> int:
        return int(self.times.size)


def subject_data(subject: Any, model: Model) -> SubjectData:
    """Convert a :class:`compartments.study.Subject` (duck-typed) for ``model``."""
    names = model.observable_names
    idx = []
    for row, o in zip(getattr(subject, "rows", range(len(subject.times))), subject.observables, strict=False):
        if o is None:
            if len(names) != 1 and o is None:
                raise UsageError(
                    f"subject {subject.id}: template {model.template.name!r} has several observables "
                    f"({', '.join(names)}); the data must say which one each value is (an 'observable' column)"
                )
            idx.append(0)
        elif o in names:
            idx.append(names.index(o))
        else:
            raise UsageError(
                f"subject {subject.id}, row {row}: observable {o!r} is not in template "
                f"{model.template.name!r}; it has {', '.join(names)}"
            )
    lloq = np.asarray(getattr(subject, "lloq", np.full(len(subject.times), np.nan)), dtype=float)
    return SubjectData(
        id=str(subject.id),
        times=np.asarray(subject.times, dtype=float),
        values=np.asarray(subject.values, dtype=float),
        obs_index=np.asarray(idx, dtype=np.int64),
        censored=np.asarray(subject.censored, dtype=bool),
        lloq=lloq,
        doses=tuple(subject.doses),
    )


@dataclass(frozen=True, eq=False)
class Problem:
    """What to estimate, from which data.

    Attributes
    ----------
    model : Model
    data : tuple of SubjectData
        One subject, or several sharing one parameter set (pooled).
    free : tuple of int
        Indices (into the template's parameters) of the estimated parameters.
    base : (p,) array
        Full parameter vector; free entries are overwritten by the stage's values.
    error : str
        Error model name (see :data:`ERROR_MODELS`).
    """

    model: Model
    data: tuple[SubjectData, ...]
    free: tuple[int, ...]
    base: Array
    error: str = "additive"

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(self.model.parameter_names[i] for i in self.free)

    @property
    def n_free(self) -> int:
        return len(self.free)

    @property
    def n_obs(self) -> int:
        return int(sum(d.n for d in self.data))

    @property
    def log_mask(self) -> NDArray[np.bool_]:
        ps = self.model.template.parameters
        return np.array([ps[i].log for i in self.free], dtype=bool)

    @property
    def lower(self) -> Array:
        ps = self.model.template.parameters
        return np.array([ps[i].lower for i in self.free], dtype=float)

    @property
    def upper(self) -> Array:
        ps = self.model.template.parameters
        return np.array([ps[i].upper for i in self.free], dtype=float)

    @property
    def phi_bounds(self) -> tuple[Array, Array]:
        """Bounds on the working scale."""
        lo, hi, lg = self.lower, self.upper, self.log_mask
        return np.where(lg, np.log(np.maximum(lo, 1e-300)), lo), np.where(lg, np.log(hi), hi)

    def to_phi(self, theta_free: Array) -> Array:
        t = np.asarray(theta_free, dtype=float)
        return np.where(self.log_mask, np.log(np.maximum(t, 1e-300)), t)

    def to_theta_free(self, phi: Array) -> Array:
        p = np.asarray(phi, dtype=float)
        return np.where(self.log_mask, np.exp(p), p)

    def full_theta(self, phi: Array) -> Array:
        theta = self.base.copy()
        theta[list(self.free)] = self.to_theta_free(phi)
        return theta

    @property
    def default_phi(self) -> Array:
        return self.to_phi(self.base[list(self.free)])

    @property
    def values(self) -> Array:
        return np.concatenate([d.values for d in self.data]) if self.data else np.zeros(0)

    @property
    def floor(self) -> float:
        """Predictions below this count as zero in the likelihood (1e-9 of the largest |value|)."""
        y = self.values
        return 1e-9 * max(float(np.max(np.abs(y))) if y.size else 1.0, 1e-300)

    @property
    def censored(self) -> NDArray[np.bool_]:
        return np.concatenate([d.censored for d in self.data]) if self.data else np.zeros(0, bool)

    @property
    def obs_index(self) -> NDArray[np.int64]:
        return np.concatenate([d.obs_index for d in self.data]) if self.data else np.zeros(0, np.int64)

    def moment_objective(self, phi: Array) -> tuple[float, Array, Array]:
        """−2LL at ``phi`` with the error parameters at their moment estimates (exact maximum
        likelihood for one scale per observable without censoring): (value, eta, predictions)."""
        y, cens, k = self.values, self.censored, self.obs_index
        f, _ = self.predict(phi)
        eta = initial_eta(self.error, y, f, k, cens, len(self.model.observable_names), self.floor)
        return float(neg2ll(self.error, y, f, eta, k, cens, self.floor).value), eta, f

    def predict(self, phi: Array, jacobian: bool = False) -> tuple[Array, Array | None]:
        """Predictions for every observation (concatenated over subjects) and ∂f/∂φ."""
        theta = self.full_theta(phi)
        fs, Js = [], []
        free = list(self.free)
        dtheta_dphi = np.where(self.log_mask, theta[free], 1.0)
        for d in self.data:
            r = simulate(self.model, theta, d.doses, d.times, sensitivities=jacobian)
            rows = np.arange(d.n)
            fs.append(r.observables[rows, d.obs_index])
            if jacobian:
                assert r.observable_sensitivities is not None
                J = r.observable_sensitivities[rows, d.obs_index][:, free] * dtheta_dphi
                Js.append(J)
        f = np.concatenate(fs) if fs else np.zeros(0)
        J = np.concatenate(Js) if jacobian and Js else (np.zeros((0, self.n_free)) if jacobian else None)
        return f, J


def check_fixed(template: Any, fixed: Mapping[str, float] | None) -> None:
    """Refuse a value to hold a parameter at that lies outside the template's range.

    Raises
    ------
    UsageError
        A value that is not a finite number inside ``[lower, upper]`` of its parameter.

    Examples
    --------
    >>> from compartments import load_template
    >>> check_fixed(load_template("one-comp-oral"), {"ka": 1.0})
    """
    by_name = {p.name: p for p in template.parameters}
    for name, value in dict(fixed or {}).items():
        p = by_name.get(name)
        if p is None:
            continue  # unknown names are reported where the parameters are matched
        try:
            v = float(value)
        except (TypeError, ValueError):
            raise UsageError(f"fixed {name} = {value!r} is not a number") from None
        if not (math.isfinite(v) and p.lower <= v <= p.upper):
            raise UsageError(
                f"fixed {name} = {v:g} {p.unit} is outside the range of template {template.name!r} "
                f"({p.lower:g} to {p.upper:g}); hold it at a value inside the range, or widen the range in a user template"
            )


def make_problem(
    model: Model,
    subjects: Sequence[Any],
    *,
    error: str = "additive",
    fixed: Mapping[str, float] | None = None,
    estimate: Sequence[str] = (),
) -> Problem:
    """Build a :class:`Problem`.

    Parameters
    ----------
    model : Model
    subjects : sequence of Subject
    error : {"additive", "proportional", "combined", "lognormal"}
    fixed : mapping, optional
        Parameters held at the given values (not estimated).
    estimate : sequence of str
        Parameters the template marks ``fixed`` that should be estimated after all
        (e.g. ``"tlag"``).
    """
    if error not in ERROR_MODELS:
        raise UsageError(f"error model must be one of {', '.join(ERROR_MODELS)}, got {error!r}")
    fixed = dict(fixed or {})
    names = model.parameter_names
    for k in list(fixed) + list(estimate):
        if k not in names:
            raise UsageError(f"parameter {k!r} is not in template {model.template.name!r}; it has {', '.join(names)}")
    check_fixed(model.template, fixed)
    base = model.param_vector(fixed)
    free = tuple(
        i
        for i, p in enumerate(model.template.parameters)
        if p.name not in fixed and (not p.fixed or p.name in estimate)
    )
    data = tuple(subject_data(s, model) for s in subjects)
    if not free:
        raise FitError("nothing to estimate: every parameter is fixed")
    return Problem(model=model, data=data, free=free, base=base, error=error)


#: Error models whose standard deviation vanishes where the prediction does.
ZERO_SD_ERRORS = ("proportional", "lognormal")


def set_aside_zero_predictions(problem: Problem) -> tuple[Problem, tuple[str, ...]]:
    """Leave out rows the model predicts as exactly zero whatever the parameters, where the
    error model cannot use them.

    A sample taken at or before a subject's first dose (a sample at a dose time sees the
    state before the dose) of a model whose states start at zero is predicted as exactly
    0 for every parameter value. Under proportional or log-normal error its standard
    deviation is then 0 too: a positive value there (a pre-dose level: carry-over, an
    endogenous baseline, assay noise) cannot be fitted at all, and a zero or censored value
    carries no information on the parameters — yet a zero residual with a zero scale would
    pull the estimated error scale towards 0. Such rows are left out, each named in a note;
    additive and combined error keep them (their likelihood is well defined there).

    Parameters
    ----------
    problem : Problem

    Returns
    -------
    problem : Problem
        The same problem without those rows (the input itself when there are none).
    notes : tuple of str
        One plain sentence naming the rows left out (empty when none).

    Notes
    -----
    "Exactly zero whatever the parameters" is checked, not assumed: the rows must be
    predicted as 0.0 both at the template defaults and at a second point of the bounded
    parameter box, so a template with a baseline or a parameter-dependent initial state
    keeps its rows.
    """
    if problem.error not in ZERO_SD_ERRORS:
        return problem, ()
    early = [d.times <= min(x.time for x in d.doses) if d.doses else np.zeros(d.n, bool) for d in problem.data]
    if not any(e.any() for e in early):
        return problem, ()
    lo, hi = problem.phi_bounds
    lo = np.where(np.isfinite(lo), lo, problem.default_phi - 1.0)
    hi = np.where(np.isfinite(hi), hi, problem.default_phi + 1.0)
    zero = np.ones(problem.n_obs, bool)
    for phi in (problem.default_phi, lo + 0.3 * (hi - lo)):
        try:
            f, _ = problem.predict(phi)
        except CompartmentsError:  # cannot be checked here: keep every row, the fit will report
            return problem, ()
        zero &= f == 0.0
    data, shown, start = [], [], 0
    n_out, positive = 0, False
    unit = problem.model.template.time_unit
    for d, e in zip(problem.data, early, strict=True):
        out = e & zero[start:start + d.n]
        start += d.n
        if not out.any():
            data.append(d)
            continue
        keep = ~out
        data.append(replace(d, times=d.times[keep], values=d.values[keep], obs_index=d.obs_index[keep],
                            censored=d.censored[keep], lloq=d.lloq[keep]))
        rows = ", ".join(f"t = {t:g} {unit}: " + ("below the LLOQ" if c else f"{v:g}")
                         for t, v, c in zip(d.times[out], d.values[out], d.censored[out], strict=True))
        shown.append(rows if len(problem.data) == 1 else f"subject {d.id} {rows}")
        n_out += int(out.sum())
        positive |= bool(np.any((d.values[out] > 0) & ~d.censored[out]))
    if not n_out:
        return problem, ()
    why = ("a positive value there (a pre-dose level) cannot be fitted and a zero carries no information; "
           "use combined error to fit pre-dose levels, or subtract the baseline"
           if positive else "these values carry no information there")
    note = (f"{n_out} sample{'s' if n_out > 1 else ''} taken at or before the first dose ({'; '.join(shown)}), "
            f"where the model predicts exactly 0, left out of the fit: under {problem.error} error {why}.")
    return replace(problem, data=tuple(data)), (note,)
