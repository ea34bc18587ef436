"""``fit_population``: the population estimator from study to :class:`PopulationResult`."""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..errors import FitError, UsageError
from ..estimate.derivatives import hessian
from ..estimate.problem import make_problem, set_aside_zero_predictions
from ..model import compiled
from ..template import Template
from .covariates import build_effects
from .design import Design, build_design
from .diagnostics import bound_sentences, predictions_table, shrinkage, warnings_for
from .evaluate import Evaluator, make_evaluator
from .foce import fit_foce, foce_objective
from .likelihood import importance_sampling
from .model import PopulationModel, parse_blocks, parse_random
from .residual import ResidualModel
from .result import PopulationResult
from .saem import SaemSettings, fit_saem
from .starts import Starts, data_starts, default_starts
from .uncertainty import covariance_from_hessian, reported, x_labels

Array = NDArray[np.float64]

METHODS = ("saem", "foce")
COVARIANCES = ("hessian", "sandwich")


def _subjects(study: Any) -> list[Any]:
    if hasattr(study, "subjects"):
        return list(study.subjects)
    if isinstance(study, (list, tuple)):
        return list(study)
    raise UsageError("fit_population needs a study (read_study(...)) or a list of subjects")


def fit_population(
    study: Any,
    template: Template | str,
    random: Sequence[str] | Mapping[str, str],
    *,
    covariates: Sequence[Any] = (),
    error: str = "proportional",
    method: str = "saem",
    seed: int = 0,
    variability: Any = "diagonal",
    fixed: Mapping[str, float] | None = None,
    estimate: Sequence[str] = (),
    starts: str = "data",
    covariance: str = "hessian",
    level: float = 0.95,
    saem: SaemSettings | None = None,
    importance_draws: int = 2000,
    npde_draws: int = 500,
    workers: int = 1,
    scheduler: Any = None,
    progress: Callable[[int, str, Array], None] | None = None,
) -> PopulationResult:
    """Population (mixed-effects) estimation: typical values, between-subject variability,
    covariate effects, residual error and individual estimates.

    Parameters
    ----------
    study : Study or list of Subject
    template : Template or str
    random : list of str or dict
        Parameters with between-subject variability: log-normal (``θ·exp(η)``) for a list,
        or ``{"ke": "normal"}`` for an additive effect (``θ + η``).
    covariates : sequence
        ``(parameter, column, form)`` or ``(parameter, column, form, reference)``; forms
        ``"power"``, ``"exponential"``, ``"linear"``, ``"categorical"`` (see
        :mod:`compartments.population.covariates`); the reference defaults to the median.
    error : {"additive", "proportional", "combined", "lognormal"}
    method : {"saem", "foce"}
    seed : int
        Seeds SAEM's chains, the importance sampling and the NPDE simulations; the same
        seed gives the same numbers, serially or in a pool.
    variability : "diagonal", "full" or list of lists of names
        Structure of the random effects' covariance.
    fixed : mapping
        Parameters held at given values.
    estimate : sequence of str
        Template parameters marked fixed that should be estimated (e.g. ``["tlag"]``).
    starts : {"data", "defaults"}
        Start values from the data (pooled and per-subject hybrid fits; the default) or from
        the template defaults.
    covariance : {"hessian", "sandwich"}
    level : float
        Confidence level of the intervals.
    saem : SaemSettings, optional
        Iteration counts and chains of SAEM.
    importance_draws : int
        Draws per subject for SAEM's −2LL.
    npde_draws : int
        Simulated replicates per subject for the NPDE.
    workers, scheduler :
        Where the per-subject start fits run (see :func:`compartments.execution.execute`).
    progress : callable, optional
        ``progress(iteration, phase, x)`` after each SAEM iteration.

    Returns
    -------
    PopulationResult

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> from compartments import read_study, fit_population
    >>> rng = np.random.default_rng(1)   # an invented study: 20 subjects, 3 samples each
    >>> rows = [{"id": i, "time": t, "conc": 100 / (20 * np.exp(0.3 * e)) * np.exp(-0.2 * t) * np.exp(0.1 * rng.standard_normal())}
    ...         for i, e in enumerate(rng.standard_normal(20)) for t in (1.0, 4.0, 8.0)]
    >>> study = read_study(pd.DataFrame(rows), dose=100, route="iv")
    >>> pop = fit_population(study, "one-comp-iv", random=["V"], error="lognormal", method="foce", starts="defaults")
    >>> round(pop.typical["ke"], 2), pop.converged
    (0.2, True)
    """
    t0 = time.perf_counter()
    if method not in METHODS:
        raise UsageError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    if covariance not in COVARIANCES:
        raise UsageError(f"covariance must be one of {', '.join(COVARIANCES)}, got {covariance!r}")
    if starts not in ("data", "defaults"):
        raise UsageError(f"starts must be 'data' or 'defaults', got {starts!r}")
    if isinstance(template, str):
        from ..library import load_template

        template = load_template(template)
    setup = prepare(study, template, random, covariates=covariates, error=error, variability=variability,
                    fixed=fixed, estimate=estimate)
    pm, design, ev, subjects, notes = setup.pm, setup.design, setup.ev, setup.subjects, setup.notes
    fixed = dict(fixed or {})
    if starts == "data":
        st = data_starts(pm, design, subjects, template, error=error, fixed=fixed, estimate=tuple(estimate),
                         seed=seed, workers=workers, scheduler=scheduler)
    else:
        st = default_starts(pm)
    rng = np.random.default_rng(seed)
    if method == "foce":
        ff = fit_foce(pm, design, ev, st.x)
        x, converged, why, iterations = ff.x, ff.converged, ff.message, ff.iterations
        trace, trace_labels, details = np.zeros((0, 0)), (), {"evaluations": ff.evaluations}
    else:
        settings = saem or SaemSettings()
        sf = fit_saem(pm, design, ev, st.x, rng, settings, progress)
        x, converged, why, iterations = sf.x, sf.converged, sf.message, sf.iterations
        trace = sf.trace
        trace_labels = tuple(pm.names) + pm.effect_labels + pm.variance_labels + pm.residual.names
        details = {"exploration": sf.explore, "chains": sf.extra["chains"], "acceptance": sf.acceptance,
                   "stopping_rule": why}
    return _finish(pm, design, ev, x, method, converged, why, iterations, st, rng, covariance, level,
                   importance_draws, npde_draws, tuple(notes), trace, trace_labels, details, seed, t0, template)


@dataclass(frozen=True, eq=False)
class Setup:
    """A population problem ready for the estimators."""

    pm: PopulationModel
    design: Design
    ev: Evaluator
    subjects: list[Any]
    notes: tuple[str, ...]


def prepare(study: Any, template: Template | str, random: Sequence[str] | Mapping[str, str], *,
            covariates: Sequence[Any] = (), error: str = "proportional", variability: Any = "diagonal",
            fixed: Mapping[str, float] | None = None, estimate: Sequence[str] = ()) -> Setup:
    """Check the inputs and lay out the population problem (see :func:`fit_population`)."""
    if isinstance(template, str):
        from ..library import load_template

        template = load_template(template)
    subjects = _subjects(study)
    model = compiled(template)
    fixed = dict(fixed or {})
    problem = make_problem(model, subjects, error=error, fixed=fixed, estimate=estimate)
    problem, notes = set_aside_zero_predictions(problem)
    if error == "lognormal" and np.any((problem.values <= 0) & ~problem.censored):
        raise FitError("log-normal error needs positive values, but some observed values are ≤ 0; use "
                       "error='additive' or 'combined', or mark them below the limit of quantification")
    names = tuple(model.parameter_names[i] for i in problem.free)
    residual = ResidualModel(error, model.observable_names, problem.floor)
    design = build_design(problem.data, residual)
    rnd = parse_random(random, names)
    order = [n for n in names if n in rnd]
    effects = build_effects(study if hasattr(study, "covariate_names") else _as_study(subjects), covariates, names)
    pm = PopulationModel(model, problem.free, problem.base, tuple(names.index(n) for n in order),
                         tuple(rnd[n] for n in order), parse_blocks(variability, order), effects, residual)
    if design.total_obs - int(design.censored.sum()) < pm.size:
        raise FitError(f"{design.total_obs} observations cannot determine the {pm.size} population parameters; "
                       "use fewer random effects or covariates, or fix parameters")
    ev = make_evaluator(model, design, problem.free)
    return Setup(pm, design, ev, subjects, tuple(notes))


def _as_study(subjects: list[Any]) -> Any:
    from types import SimpleNamespace

    names = list(dict.fromkeys(k for s in subjects for k in getattr(s, "covariates", {})))
    return SimpleNamespace(subjects=subjects, covariate_names=names, notes=())


def _finish(pm: PopulationModel, design: Any, ev: Any, x: Array, method: str, converged: bool, why: str,
            iterations: int, st: Starts, rng: np.random.Generator, covariance: str, level: float,
            importance_draws: int, npde_draws: int, notes: tuple[str, ...], trace: Array,
            trace_labels: tuple[str, ...], details: dict[str, Any], seed: int, t0: float,
            template: Template) -> PopulationResult:
    N = design.n_subjects
    obj = foce_objective(pm, design, ev, x, np.zeros((N, pm.q)))
    eta = obj.modes.point.eta
    labels = x_labels(pm)

    def grad(z: Array) -> Array:
        return foce_objective(pm, design, ev, z, eta).gradient

    H = hessian(grad, x, rel=1e-4)
    cov = covariance_from_hessian(H, obj.subject_gradients, covariance, labels)
    C = cov.matrix
    d = np.sqrt(np.abs(np.diag(C)))
    corr = C / np.outer(d, d) if np.all(np.isfinite(C)) else np.full_like(C, np.nan)
    rep = reported(pm, x, C, level)
    if method == "saem":
        sl = importance_sampling(pm, design, ev, x, eta, obj.M, rng, importance_draws)
        objective, objective_se = sl.value, sl.se
        details = {**details, "foce_objective": obj.value, "importance_draws": importance_draws,
                   "effective_draws_min": float(np.min(sl.effective))}
    else:
        objective, objective_se = obj.value, float("nan")
    k = pm.size
    n_obs = design.total_obs
    preds = predictions_table(pm, design, ev, x, eta, rng, npde_draws)
    shrink = shrinkage(pm, x, eta, preds["iwres"].to_numpy())
    individual = _individual(pm, design, obj.m, eta, obj.M)
    no_q = [i for i, n in zip(design.ids, design.n_quantified, strict=True) if n == 0]
    warn = list(notes) + list(st.notes) + warnings_for(
        pm, x, converged=converged, why=why, shrink=shrink, correlation=corr, labels=labels,
        covariance_failed=cov.failed, no_quantified=no_q, at_bound=bound_sentences(pm, x))
    units = {p.name: p.unit for p in template.parameters}
    from ..estimate.hybrid import _versions

    return PopulationResult(
        template=template.name, method=method, error_model=pm.residual.kind,
        typical={n: rep.estimates[n] for n in pm.names}, random=pm.random_names, random_kinds=pm.kinds,
        variability_matrix=pm.omega(x), effects={n: rep.estimates[n] for n in pm.effect_labels},
        error_parameters={n: rep.estimates[n] for n in pm.residual.names},
        se=rep.se, rse=rep.rse, ci=rep.ci, estimate_labels=labels, estimate_vector=x.copy(), covariance=C,
        correlation=corr, covariance_method=f"{cov.method} ({'FOCE-I linearisation' if method == 'saem' else 'FOCE-I'})",
        objective=float(objective), objective_se=float(objective_se), aic=float(objective + 2 * k),
        bic=float(objective + k * np.log(max(n_obs, 1))), n_parameters=k, n_subjects=N, n_obs=n_obs,
        individual=individual, shrinkage=shrink, predictions=preds, warnings=tuple(warn), converged=converged,
        iterations=iterations, seed=seed, wall_time=time.perf_counter() - t0, units=units, model=pm.describe(),
        starts={"source": st.source, "wall_time": st.wall_time, "values": st.x.tolist()}, notes=notes,
        trace=trace, trace_labels=trace_labels, details=details, versions=_versions(),
    )


def _individual(pm: PopulationModel, design: Any, m: Array, eta: Array, M: Array) -> pd.DataFrame:
    psi = pm.psi(m, eta)
    theta = pm.natural(psi)
    cov = np.linalg.inv(M)
    sd_eta = np.sqrt(np.maximum(np.einsum("bii->bi", cov), 0.0))
    out: dict[str, Any] = {}
    for j, n in enumerate(pm.names):
        out[n] = theta[:, j]
    for r, j in enumerate(pm.random):
        n = pm.names[j]
        out[f"sd_{n}"] = sd_eta[:, r] * (theta[:, j] if pm.log_scale[j] else 1.0)
    for r, j in enumerate(pm.random):
        out[f"random_effect_{pm.names[j]}"] = eta[:, r]
    frame = pd.DataFrame(out, index=pd.Index(list(design.ids), name="subject"))
    return frame



