"""Start values with no user input: from the data, through the per-subject estimator.

* **Typical values and residual error.** The hybrid estimator (the physics-informed network
  stage, then maximum likelihood on the exact solution) fitted to all subjects' data
  pooled — one parameter set — through the public :func:`compartments.fit` with
  ``pooled=True``.
* **Between-subject variability.** Subjects with enough quantified observations to be
  fitted alone (at least two more than the estimated parameters) are fitted one by one by
  the likelihood stage (``strategy="nls"``: the network stage already ran on the pooled
  data, and on a loaded 2-core machine it cost 2–3 s per Theoph subject against 0.5 s for
  the likelihood stage alone) through the cohort executors (:mod:`compartments.execution`; serially, in a pool or on
  Dask, with identical numbers). When at least three such fits succeed, the median of
  their estimates replaces the pooled typical value of a parameter with a random effect,
  and the robust spread (median absolute deviation × 1.4826, on the random effect's scale)
  of the estimates sets its variance, within 0.05²–1 on the log scale. Otherwise each
  variance starts at 0.3² (a 30 % coefficient of variation, common practice).
* **Residual error.** The pooled fit's error absorbs the between-subject variation, so its
  error parameters are halved (with rich subjects, their median error is used instead).
* **Covariate effects** start at 0 (no effect).

``starts="defaults"`` uses the template defaults, 0.3² variances and error parameters from
the residuals at the defaults instead (the comparison the benchmark measures).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..errors import CompartmentsError
from .design import Design
from .model import PopulationModel

Array = NDArray[np.float64]

DEFAULT_VARIANCE = 0.3**2
MIN_RICH = 3


@dataclass(frozen=True)
class Starts:
    """Start of the estimation vector and where it came from."""

    x: Array
    source: str
    notes: tuple[str, ...] = ()
    subject_fits: dict[str, dict[str, float]] = field(default_factory=dict)
    wall_time: float = 0.0


def _error_start(pm: PopulationModel, values: dict[str, float] | None, scale: float) -> Array:
    names = pm.residual.names
    out = np.full(pm.n_error, np.log(0.1))
    if values:
        for j, n in enumerate(names):
            v = values.get(n)
            if v is not None and np.isfinite(v) and v > 0:
                out[j] = np.log(v * scale)
    return out


def _assemble(pm: PopulationModel, mu: Array, variances: Array, err: Array) -> Array:
    x = np.zeros(pm.size)
    sm, sb, sl, ss = pm.slices
    lo = np.array([b[0] for b in pm.mu_bounds()])
    hi = np.array([b[1] for b in pm.mu_bounds()])
    x[sm] = np.clip(mu, lo, hi)
    x[sl] = pm.chol_entries(np.diag(variances))
    x[ss] = err
    return x


def default_starts(pm: PopulationModel) -> Starts:
    """Template defaults, 30 % variability, 10 % (or 0.1) error."""
    mu = pm.to_scale(pm.base[list(pm.free)])
    return Starts(_assemble(pm, mu, np.full(pm.q, DEFAULT_VARIANCE), np.full(pm.n_error, np.log(0.1))),
                  "template defaults")


def data_starts(pm: PopulationModel, design: Design, subjects: list[Any], template: Any, *, error: str,
                fixed: dict[str, float], estimate: tuple[str, ...], seed: int, workers: int = 1,
                scheduler: Any = None) -> Starts:
    """Starts from the pooled hybrid fit and the fits of subjects rich enough to fit alone."""
    import time

    from ..estimate.hybrid import fit

    t0 = time.perf_counter()
    notes: list[str] = []
    names = pm.names
    try:
        pooled = fit(subjects, template, error=error, pooled=True, seed=seed, fixed=fixed, estimate=estimate)
    except CompartmentsError as exc:
        pooled = None
        notes.append(f"The pooled fit for start values failed ({exc}); template defaults used instead.")
    if pooled is not None and pooled.ok:
        mu = pm.to_scale(np.array([pooled.estimates.get(n, pm.base[i]) for n, i in zip(names, pm.free, strict=True)]))
        err = _error_start(pm, dict(pooled.error_parameters), 0.5)
        source = "pooled fit"
    else:
        if pooled is not None:
            notes.append(f"The pooled fit for start values failed ({pooled.message}); template defaults used instead.")
        mu = pm.to_scale(pm.base[list(pm.free)])
        err = np.full(pm.n_error, np.log(0.1))
        source = "template defaults"
    variances = np.full(pm.q, DEFAULT_VARIANCE)
    rich = [s for s, nq in zip(subjects, design.n_quantified, strict=True) if nq >= pm.p + 2]
    fits = _subject_fits(rich, template, error, fixed, estimate, seed, workers, scheduler) if len(rich) >= MIN_RICH else {}
    if len(fits) >= MIN_RICH:
        est = np.array([[f["estimates"][n] for n in names] for f in fits.values()])
        psi = pm.to_scale(est)
        for r, j in enumerate(pm.random):
            col = psi[:, j]
            mu[j] = float(np.median(col))
            mad = 1.4826 * float(np.median(np.abs(col - np.median(col))))
            if pm.log_scale[j]:
                variances[r] = float(np.clip(mad, 0.05, 1.0)) ** 2
            else:
                variances[r] = max(mad, 0.05 * abs(mu[j]) + 1e-12) ** 2
        errs = {n: float(np.median([f["error"][n] for f in fits.values()])) for n in pm.residual.names}
        err = _error_start(pm, errs, 1.0)
        source += f" and {len(fits)} subjects fitted alone"
    return Starts(_assemble(pm, mu, variances, err), source, tuple(notes),
                  {k: dict(v["estimates"]) for k, v in fits.items()}, time.perf_counter() - t0)


def _subject_fits(subjects: list[Any], template: Any, error: str, fixed: dict[str, float],
                  estimate: tuple[str, ...], seed: int, workers: int, scheduler: Any) -> dict[str, dict[str, Any]]:
    """Per-subject hybrid fits through the cohort executors; the successful ones, by subject."""
    from ..execution import Task, execute, task_seed

    tasks = [Task.from_subjects([s], template, {"error": error, "fixed": dict(fixed), "estimate": tuple(estimate),
                                                "strategy": "nls",
                                                "seed": task_seed(seed, str(s.id), template.name)})
             for s in subjects]
    out: dict[str, dict[str, Any]] = {}

    def keep(outcome: Any) -> None:
        r = outcome.result
        if r.ok and not any("bound" in w for w in r.warnings):
            out[outcome.subject] = {"estimates": dict(r.estimates), "error": dict(r.error_parameters)}

    execute(tasks, keep, workers=workers, scheduler=scheduler)
    return {s.id: out[str(s.id)] for s in subjects if str(s.id) in out}
