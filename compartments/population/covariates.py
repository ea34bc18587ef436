"""Covariate models: how a subject-level covariate moves a parameter's typical value.

A covariate effect multiplies the typical value ``θ`` of a parameter by a factor (it adds
``log factor`` on the log scale), with ``ref`` the reference value (the median over
subjects unless given):

=============  ==============================  =========================================
form           factor                          reported effect
=============  ==============================  =========================================
power          ``(c/ref)^β``                   the exponent β
exponential    ``exp(β (c − ref))``            β, per unit of the covariate
linear         ``1 + β (c − ref)``             β, per unit (bounded so the factor stays > 0)
categorical    one factor per level            each non-reference level's factor
=============  ==============================  =========================================

(common practice; e.g. Mould & Upton 2012, CPT Pharmacometrics Syst Pharmacol 1:e6).
For a categorical covariate the reference level is the most frequent one unless given;
internally each level's factor is estimated as its logarithm.

Covariates are per subject, from the study's columns. A column that changes within a
subject is not read as a covariate (the study reader notes it); asking for it, or for a
covariate missing for some subject, is an error that says which subjects and what to do.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..errors import UsageError

Array = NDArray[np.float64]

FORMS = ("power", "exponential", "linear", "categorical")
#: Largest |exponent| of a power effect (a bound the estimate is checked against).
POWER_LIMIT = 10.0
#: Largest |log factor| across a covariate's range for exponential and categorical effects.
LOG_FACTOR_LIMIT = math.log(1000.0)


@dataclass(frozen=True)
class CovariateEffect:
    """One covariate on one parameter.

    Attributes
    ----------
    parameter : str
    column : str
    form : str
    reference : float or str
    levels : tuple of str
        Non-reference levels (categorical only).
    values : (N,) array
        Numeric covariate per subject (continuous forms), or level codes (categorical:
        index into ``levels`` plus one, 0 for the reference).
    """

    parameter: str
    column: str
    form: str
    reference: Any
    levels: tuple[str, ...]
    values: Array

    @property
    def labels(self) -> tuple[str, ...]:
        """Names of the effects, ``"V:weight"`` or ``"V:sex=F"`` per level."""
        if self.form == "categorical":
            return tuple(f"{self.parameter}:{self.column}={lv}" for lv in self.levels)
        return (f"{self.parameter}:{self.column}",)

    @property
    def size(self) -> int:
        return len(self.levels) if self.form == "categorical" else 1

    def log_factor(self, beta: Array) -> tuple[Array, Array]:
        """``log factor`` per subject (N,) and its derivative in ``beta`` (N, size)."""
        c = self.values
        if self.form == "categorical":
            ind = (c[:, None] == np.arange(1, self.size + 1)[None, :]).astype(float)
            return ind @ beta, ind
        b = float(beta[0])
        ref = float(self.reference)
        if self.form == "power":
            x = np.log(c / ref)
            return b * x, x[:, None]
        if self.form == "exponential":
            x = c - ref
            return b * x, x[:, None]
        x = c - ref
        inner = 1.0 + b * x
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.log(np.maximum(inner, 1e-300)), (x / inner)[:, None]

    def bounds(self) -> list[tuple[float, float]]:
        """Bounds of each effect on the estimation scale."""
        c = self.values
        if self.form == "categorical":
            return [(-LOG_FACTOR_LIMIT, LOG_FACTOR_LIMIT)] * self.size
        if self.form == "power":
            return [(-POWER_LIMIT, POWER_LIMIT)]
        ref = float(self.reference)
        spread = max(float(np.max(np.abs(c - ref))), 1e-12)
        if self.form == "exponential":
            return [(-LOG_FACTOR_LIMIT / spread, LOG_FACTOR_LIMIT / spread)]
        # linear: 1 + β (c − ref) ≥ 0.01 for every subject
        hi_c, lo_c = float(np.max(c)) - ref, float(np.min(c)) - ref
        lower = -0.99 / hi_c if hi_c > 0 else -1e3 / spread
        upper = 0.99 / -lo_c if lo_c < 0 else 1e3 / spread
        return [(lower, upper)]

    def reported(self, beta: Array) -> Array:
        """Effects as reported: categorical log factors become factors."""
        return np.exp(beta) if self.form == "categorical" else np.asarray(beta, dtype=float)


def _parse(item: Any) -> tuple[str, str, str, Any]:
    if isinstance(item, Mapping):
        try:
            return (str(item["parameter"]), str(item["column"]), str(item.get("form", "power")),
                    item.get("reference"))
        except KeyError as exc:
            raise UsageError(f"covariates: each entry needs 'parameter' and 'column'; {dict(item)!r} has no {exc}") from None
    if isinstance(item, (tuple, list)) and len(item) in (3, 4):
        ref = item[3] if len(item) == 4 else None
        return str(item[0]), str(item[1]), str(item[2]), ref
    raise UsageError(f"covariates: expected (parameter, column, form) or (parameter, column, form, reference), got {item!r}")


def _column_values(study: Any, column: str, parameter: str) -> list[Any]:
    names = list(getattr(study, "covariate_names", []))
    if column not in names:
        notes = [n.reason for n in getattr(study, "notes", ()) if getattr(n, "column", None) == column]
        varying = [m for m in notes if "changes within subject" in m]
        if varying:
            raise UsageError(
                f"covariate '{column}' for {parameter} changes within a subject ({varying[0]}); only covariates "
                "constant within each subject are supported: use its value at the first dose (e.g. baseline "
                "weight) in a column of its own")
        shown = ", ".join(names) if names else "none"
        raise UsageError(f"covariates: the study has no covariate column '{column}' (for {parameter}); "
                         f"its covariates are: {shown}")
    values = [s.covariates.get(column) for s in study.subjects]
    missing = [s.id for s, v in zip(study.subjects, values, strict=True)
               if v is None or (isinstance(v, float) and not math.isfinite(v))]
    if missing:
        shown = ", ".join(missing[:10]) + (" ..." if len(missing) > 10 else "")
        raise UsageError(
            f"covariate '{column}' (for {parameter}) is missing for {len(missing)} subject(s): {shown}; fill it in "
            "(e.g. with a documented imputed value) or leave those subjects out (study.subset(...))")
    return values


def build_effects(study: Any, items: Sequence[Any], parameters: Sequence[str]) -> tuple[CovariateEffect, ...]:
    """Check and build the covariate effects asked for in ``fit_population(covariates=...)``.

    Parameters
    ----------
    study : Study
    items : sequence
        ``(parameter, column, form)`` or ``(parameter, column, form, reference)``, or
        mappings with those keys.
    parameters : sequence of str
        The estimated parameters.

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> subs = [SimpleNamespace(id=str(i), covariates={"weight": w}) for i, w in enumerate([50, 70, 90])]
    >>> st = SimpleNamespace(subjects=subs, covariate_names=["weight"], notes=())
    >>> e = build_effects(st, [("V", "weight", "power")], ["ka", "V"])[0]
    >>> e.reference, e.labels
    (70.0, ('V:weight',))
    """
    out: list[CovariateEffect] = []
    seen: set[tuple[str, str]] = set()
    for item in items:
        param, column, form, ref = _parse(item)
        if form not in FORMS:
            raise UsageError(f"covariate form {form!r} for {param}:{column} is not one of {', '.join(FORMS)}")
        if param not in parameters:
            raise UsageError(f"covariate on {param!r}: it is not an estimated parameter; estimated are "
                             f"{', '.join(parameters)}")
        if (param, column) in seen:
            raise UsageError(f"covariate '{column}' is given twice for {param}")
        seen.add((param, column))
        raw = _column_values(study, column, param)
        if form == "categorical":
            out.append(_categorical(param, column, raw, ref))
            continue
        try:
            c = np.array([float(v) for v in raw], dtype=float)
        except (TypeError, ValueError):
            raise UsageError(f"covariate '{column}' has non-numeric values (e.g. {raw[0]!r}); use form "
                             "'categorical' for it") from None
        reference = float(np.median(c)) if ref is None else float(ref)
        if not math.isfinite(reference):
            raise UsageError(f"covariate reference for {param}:{column} must be a finite number, got {ref!r}")
        if form == "power" and (np.any(c <= 0) or reference <= 0):
            raise UsageError(f"covariate '{column}' has values ≤ 0, which the power form (c/ref)^β cannot take; "
                             "use the 'exponential' or 'linear' form")
        if np.ptp(c) == 0:
            raise UsageError(f"covariate '{column}' has the same value ({c[0]:g}) for every subject: its effect "
                             f"on {param} cannot be estimated")
        out.append(CovariateEffect(param, column, form, reference, (), c))
    return tuple(out)


def _categorical(param: str, column: str, raw: list[Any], ref: Any) -> CovariateEffect:
    text = [str(v) for v in raw]
    levels = sorted(set(text), key=lambda v: (-text.count(v), v))
    if len(levels) < 2:
        raise UsageError(f"covariate '{column}' has one level ({levels[0]!r}) in every subject: its effect "
                         f"on {param} cannot be estimated")
    reference = levels[0] if ref is None else str(ref)
    if reference not in levels:
        raise UsageError(f"reference level {ref!r} of covariate '{column}' does not occur; levels are "
                         f"{', '.join(levels)}")
    others = tuple(v for v in levels if v != reference)
    codes = np.array([0 if v == reference else others.index(v) + 1 for v in text], dtype=float)
    return CovariateEffect(param, column, "categorical", reference, others, codes)
