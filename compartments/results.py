"""The results object that flows from fit to report.

:class:`FitResult` is a frozen dataclass holding everything a report, an export or a
comparison needs; presentation code reads it and never recomputes estimates.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .dosing import Dose
from .estimate.stages import StageResult
from .template import Template

Array = NDArray[np.float64]


@dataclass(frozen=True)
class DerivedValue:
    """A derived quantity with its delta-method SE (nan when unavailable)."""

    name: str
    value: float
    se: float
    unit: str
    description: str = ""


@dataclass(frozen=True)
class Residuals:
    """Per-observation residuals (all subjects of the fit, in data order)."""

    subject: tuple[str, ...]
    time: Array
    observable: tuple[str, ...]
    observed: Array
    predicted: Array
    censored: NDArray[np.bool_]
    raw: Array  # observed − predicted (log scale for log-normal error)
    weighted: Array  # raw / residual SD


@dataclass(frozen=True)
class FitResult:
    """Everything one fit produced.

    Attributes mirror the report: ``estimates``, ``se``, ``rse`` (%), ``ci`` (95 %) are
    keyed by parameter name on the natural scale; ``covariance`` and ``correlation`` are
    on the working scale (log for log-fitted parameters) in ``parameter_names`` order.
    ``objective`` is −2 log-likelihood at the estimate. ``status`` is ``"ok"`` or
    ``"failed"`` (then ``message`` says why and the numbers are empty).
    """

    template: str
    subject: str
    status: str
    message: str
    error_model: str
    parameter_names: tuple[str, ...]
    units: Mapping[str, str]
    estimates: Mapping[str, float]
    se: Mapping[str, float]
    rse: Mapping[str, float]
    ci: Mapping[str, tuple[float, float]]
    fixed: Mapping[str, float]
    error_parameters: Mapping[str, float]
    covariance: Array
    correlation: Array
    covariance_method: str
    objective: float
    aic: float
    aicc: float
    bic: float
    n_obs: int
    n_params: int
    residuals: Residuals | None
    derived: Mapping[str, DerivedValue]
    stages: tuple[StageResult, ...]
    warnings: tuple[str, ...]
    seed: int
    strategy: str
    versions: Mapping[str, str]
    wall_time: float
    log_scale: Mapping[str, bool] = field(default_factory=dict)  # estimated on the log scale
    alternatives: tuple[Mapping[str, float], ...] = ()
    profiles: Mapping[str, Any] = field(default_factory=dict)
    bootstrap: Mapping[str, Any] = field(default_factory=dict)
    doses: Mapping[str, tuple[Dose, ...]] = field(default_factory=dict)
    model_template: Template | None = field(default=None, repr=False, compare=False)

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    @property
    def theta(self) -> dict[str, float]:
        """Every template parameter: estimates and fixed values."""
        return {**dict(self.fixed), **dict(self.estimates)}

    def predict(self, times: Any, subject: str | None = None, observable: str | None = None,
                doses: Any = None) -> Array:
        """Model prediction at ``times`` for a subject of this fit (its own doses)."""
        from .model import compiled
        from .simulate import simulate

        if self.model_template is None or not self.ok:
            raise ValueError("this result has no fitted model to predict from")
        model = compiled(self.model_template)
        if doses is None:
            key = subject if subject is not None else next(iter(self.doses), None)
            doses = self.doses.get(key, ()) if key is not None else ()
        r = simulate(model, self.theta, doses, np.asarray(times, dtype=float))
        return r.observable(observable)

    def sensitivity(self, times: Any, subject: str | None = None, observable: str | None = None) -> Array:
        """∂prediction/∂θ (natural scale) for the estimated parameters, shape (T, k)."""
        from .model import compiled
        from .simulate import simulate

        if self.model_template is None or not self.ok:
            raise ValueError("this result has no fitted model")
        model = compiled(self.model_template)
        key = subject if subject is not None else next(iter(self.doses), None)
        doses = self.doses.get(key, ()) if key is not None else ()
        r = simulate(model, self.theta, doses, np.asarray(times, dtype=float), sensitivities=True)
        idx = [model.parameter_names.index(n) for n in self.parameter_names]
        return r.sensitivity(observable)[:, idx]
