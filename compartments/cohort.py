"""Cohorts: every subject × every template, fitted and compared.

:func:`run_cohort` maps :func:`~compartments.estimate.hybrid.fit` over the subjects of a
study and a list of templates — in this process, in a pool of worker processes or on a
Dask cluster (see :mod:`compartments.execution`) — streams each finished fit to a run
directory (see :mod:`compartments.rundir`) so an interrupted run can resume, and returns a
:class:`CohortResult` with the per-subject model comparisons. Summaries across subjects
live in :mod:`compartments.summaries`.

Each subject × model fit gets its own seed derived from the run's seed, the subject id
and the model name (:func:`~compartments.execution.task_seed`), so results are the same
for any number of workers and on Dask.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .comparison import CRITERIA, ModelComparison, compare_models
from .errors import UsageError
from .estimate.hybrid import STRATEGIES
from .estimate.problem import ERROR_MODELS
from .execution import Outcome, Task, execute, task_seed, usable_cores
from .results import FitResult
from .template import Template

__all__ = ["CohortResult", "run_cohort"]

Progress = Callable[[int, int, int], None]


@dataclass(frozen=True)
class CohortResult:
    """Every fit of a cohort run, with the per-subject comparisons.

    Attributes
    ----------
    fits : tuple of FitResult
        One per subject × model, in study order of subjects, then the order of models
        given. Failed fits carry the reason in ``message``. After an interruption only
        the finished ones.
    subjects : tuple of str
        Subject ids in study order (``("pooled",)`` for a pooled run).
    models : tuple of str
        Template names in the order given.
    comparisons : Mapping
        Subject id -> :class:`~compartments.comparison.ModelComparison` (only when more
        than one model was fitted).
    settings : Mapping
        What the run was asked to do and how it ran: ``error``, ``strategy``, ``seed``,
        ``pooled``, ``profile``, ``bootstrap``, ``fixed``, ``estimate``, ``criterion``,
        ``workers``, ``scheduler``, ``execution`` (``"serial"``, ``"processes"`` or
        ``"dask"``), ``fit_timeout``, ``subjects``, ``models``, ``run_dir``, ``resumed``
        (fits taken from the run directory).
    run_dir : str or None
    interrupted : bool
        True when the run was stopped (Ctrl-C); finished fits are kept and, with a run
        directory, ``resume=True`` continues it.
    n_failed : int
    """

    fits: tuple[FitResult, ...]
    subjects: tuple[str, ...]
    models: tuple[str, ...]
    comparisons: Mapping[str, ModelComparison] = field(default_factory=dict)
    settings: Mapping[str, Any] = field(default_factory=dict)
    run_dir: str | None = None
    interrupted: bool = False
    n_failed: int = 0

    @property
    def n_total(self) -> int:
        """Number of subject × model fits the run was asked for."""
        return len(self.subjects) * len(self.models)

    @property
    def complete(self) -> bool:
        """Every asked-for fit finished (successfully or not)."""
        return not self.interrupted and len(self.fits) == self.n_total

    def get(self, subject: str, model: str) -> FitResult | None:
        """The fit of ``subject`` with ``model``, or None if it did not run."""
        for f in self.fits:
            if f.subject == str(subject) and f.template == model:
                return f
        return None

    def for_model(self, model: str) -> tuple[FitResult, ...]:
        """The fits of one model, in subject order."""
        return tuple(f for f in self.fits if f.template == model)

    @property
    def failed(self) -> tuple[FitResult, ...]:
        return tuple(f for f in self.fits if not f.ok)

    def resume_hint(self) -> str:
        """A sentence saying how to continue an interrupted run."""
        if self.run_dir:
            return (f"{len(self.fits)} of {self.n_total} fits finished and are saved in {self.run_dir}; "
                    f"continue with resume=True (on the command line: --resume {self.run_dir})")
        return (f"{len(self.fits)} of {self.n_total} fits finished; they were not saved (no run directory): "
                "give run_dir (--run-dir) to be able to resume")


def _templates(templates: Sequence[Template | str] | Template | str) -> list[Template]:
    from .library import load_template

    if isinstance(templates, (str, Template)):
        templates = [templates]
    out = [load_template(t) if isinstance(t, str) else t for t in templates]
    if not out:
        raise UsageError("run_cohort needs at least one template (--model NAME)")
    names = [t.name for t in out]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise UsageError(f"two templates share the name {', '.join(map(repr, dup))}; results are keyed by "
                         "template name: save a variant as a user template with its own name")
    return out


def _subjects(study: Any, wanted: Sequence[str] | None) -> list[Any]:
    if hasattr(study, "subjects"):
        all_subjects = list(study.subjects)
    elif isinstance(study, Iterable):
        all_subjects = list(study)
    else:
        raise UsageError("run_cohort needs a Study (compartments.read_study) or a list of subjects")
    if not all_subjects:
        raise UsageError("the study has no subjects to fit")
    if wanted is None:
        return all_subjects
    if isinstance(wanted, str):
        wanted = [wanted]
    ids = [str(s.id) for s in all_subjects]
    wanted = [str(w) for w in wanted]
    missing = [w for w in wanted if w not in ids]
    if missing:
        shown = ", ".join(ids[:10]) + (" ..." if len(ids) > 10 else "")
        raise UsageError(f"no subject {', '.join(map(repr, missing))} in the study; subjects are {shown}")
    keep = set(wanted)
    return [s for s in all_subjects if str(s.id) in keep]


def _per_template(templates: Sequence[Template], fixed: Mapping[str, float] | None,
                  estimate: Sequence[str]) -> dict[str, tuple[dict[str, float], tuple[str, ...]]]:
    """``fixed`` and ``estimate`` restricted to each template's parameters."""
    fixed = dict(fixed or {})
    estimate = (estimate,) if isinstance(estimate, str) else tuple(estimate)
    known = {n for t in templates for n in t.parameter_names}
    unknown = [n for n in list(fixed) + list(estimate) if n not in known]
    if unknown:
        raise UsageError(f"parameter {', '.join(map(repr, unknown))} is in none of the templates "
                         f"({', '.join(t.name for t in templates)}); check the name")
    return {t.name: ({k: float(v) for k, v in fixed.items() if k in t.parameter_names},
                     tuple(n for n in estimate if n in t.parameter_names)) for t in templates}


def _check_options(error: str, strategy: str, seed: Any, workers: int | None, fit_timeout: float | None,
                   criterion: str, bootstrap: int, run_dir: Any, resume: bool) -> None:
    if error not in ERROR_MODELS:
        raise UsageError(f"error={error!r} is not an error model; use one of {', '.join(ERROR_MODELS)}")
    if strategy not in STRATEGIES:
        raise UsageError(f"strategy={strategy!r} is not a strategy; use one of {', '.join(STRATEGIES)}")
    if criterion not in CRITERIA:
        raise UsageError(f"criterion={criterion!r} is not a criterion; use one of {', '.join(CRITERIA)}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise UsageError(f"seed={seed!r} must be a whole number ≥ 0")
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise UsageError(f"workers={workers!r} must be a whole number ≥ 1")
    if fit_timeout is not None and (isinstance(fit_timeout, bool) or not isinstance(fit_timeout, (int, float))
                                    or not math.isfinite(fit_timeout) or fit_timeout <= 0):
        raise UsageError(f"fit_timeout={fit_timeout!r} must be a positive number of seconds")
    if isinstance(bootstrap, bool) or not isinstance(bootstrap, int) or bootstrap < 0:
        raise UsageError(f"bootstrap={bootstrap!r} must be a whole number ≥ 0")
    if resume and run_dir is None:
        raise UsageError("resume needs the run directory to continue (run_dir=..., --resume DIR)")


def run_cohort(
    study: Any,
    templates: Sequence[Template | str] | Template | str,
    *,
    error: str = "additive",
    strategy: str = "hybrid",
    seed: int = 0,
    subjects: Sequence[str] | None = None,
    pooled: bool = False,
    profile: bool = False,
    bootstrap: int = 0,
    fixed: Mapping[str, float] | None = None,
    estimate: Sequence[str] = (),
    workers: int | None = None,
    scheduler: str | None = None,
    fit_timeout: float | None = None,
    run_dir: str | Path | None = None,
    resume: bool = False,
    progress: Progress | None = None,
    criterion: str = "aic",
    fit_options: Mapping[str, Any] | None = None,
) -> CohortResult:
    """Fit every subject with every template and compare the models per subject.

    Parameters
    ----------
    study : Study or sequence of Subject
    templates : sequence of Template or str
        Templates or template names; names must differ.
    error, strategy, profile, bootstrap :
        As for :func:`~compartments.estimate.hybrid.fit`.
    seed : int
        The run's seed; each subject × model fit gets a seed derived from it, the subject
        id and the model name.
    subjects : sequence of str, optional
        Fit only these subjects (kept in study order).
    pooled : bool
        One fit per template to all the chosen subjects' data together.
    fixed : mapping, optional
        Parameters held at given values; each template takes the ones it has (a name in
        none of the templates is an error).
    estimate : sequence of str
        Parameters a template marks fixed that should be estimated, where present.
    workers : int, optional
        Processes to use; 1 runs in this process; default every usable core (never more
        than there are fits).
    scheduler : str, optional
        Address of a running Dask distributed scheduler (``"tcp://host:8786"``) to run
        the fits on (needs the ``cluster`` extra); ``workers`` is then ignored.
    fit_timeout : float, s, optional
        Time limit per fit; a fit that runs longer is recorded as failed ("timed out
        after S s"). Serially and on Dask the fit is stopped between Python steps (a long
        call into compiled code finishes first); in a process pool a worker stuck past
        twice the limit is also stopped from outside.
    run_dir : str or Path, optional
        Folder where each finished fit is saved as soon as it is done (a new or empty
        folder, or with ``resume`` one made by an earlier run).
    resume : bool
        Continue the run in ``run_dir``: fits that finished are read back, the rest run.
        The settings must be the same.
    progress : callable, optional
        ``progress(done, total, failed)`` after each fit (and once at the start); raising
        ``KeyboardInterrupt`` from it stops the run like Ctrl-C.
    criterion : {"aic", "aicc", "bic"}
        For the per-subject comparisons.
    fit_options : mapping, optional
        Further keyword arguments of ``fit`` (``n_starts``, ``network``, ``level``).

    Returns
    -------
    CohortResult
        On Ctrl-C (or ``KeyboardInterrupt`` from ``progress``) the finished fits with
        ``interrupted=True``; every finished fit is already in ``run_dir``.

    Raises
    ------
    UsageError
        Invalid options, unknown subjects, or a run directory that cannot be used as
        asked. Fits that fail never raise: they are failed results with the reason.

    Notes
    -----
    Worker processes start from a clean server process (``forkserver``; ``spawn`` where
    that is missing) and import the main module again, so a script that runs a cohort
    with ``workers > 1`` keeps its top-level work under ``if __name__ == "__main__":``.
    Fits whose worker crashed are tried once more in a fresh pool, then recorded as failed.

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> from compartments import read_study
    >>> t = np.array([0.5, 1, 2, 4, 8, 12, 24])
    >>> frame = pd.DataFrame({"id": np.repeat(["a", "b"], 7), "time": np.tile(t, 2),
    ...     "conc": np.r_[8 * (np.exp(-0.1 * t) - np.exp(-1.5 * t)), 6 * (np.exp(-0.2 * t) - np.exp(-1.0 * t))]})
    >>> study = read_study(frame, dose=100, route="oral")
    >>> cohort = run_cohort(study, ["one-comp-oral"], strategy="nls", workers=1)
    >>> [f.status for f in cohort.fits], cohort.n_failed
    (['ok', 'ok'], 0)
    """
    _check_options(error, strategy, seed, workers, fit_timeout, criterion, bootstrap, run_dir, resume)
    tmpl = _templates(templates)
    chosen = _subjects(study, subjects)
    restricted = _per_template(tmpl, fixed, estimate)
    extra = dict(fit_options or {})
    clash = sorted(set(extra) & {"error", "strategy", "seed", "pooled", "profile", "bootstrap", "fixed", "estimate"})
    if clash:
        raise UsageError(f"fit_options may not set {', '.join(clash)}; use run_cohort's own arguments")
    timeout = float(fit_timeout) if fit_timeout is not None else None

    tasks: list[Task] = []
    groups = [chosen] if pooled else [[s] for s in chosen]
    for group in groups:
        label = "pooled" if pooled else str(group[0].id)
        for t in tmpl:
            fx, est = restricted[t.name]
            options = {"error": error, "strategy": strategy, "seed": task_seed(seed, label, t.name),
                       "profile": bool(profile), "bootstrap": int(bootstrap), "fixed": fx, "estimate": est, **extra}
            tasks.append(Task.from_subjects(group, t, options, timeout=timeout, pooled=pooled))
    subject_ids = ("pooled",) if pooled else tuple(str(s.id) for s in chosen)
    models = tuple(t.name for t in tmpl)

    shaping = {"error": error, "strategy": strategy, "seed": int(seed), "pooled": bool(pooled),
               "profile": bool(profile), "bootstrap": int(bootstrap), "fixed": dict(fixed or {}),
               "estimate": list((estimate,) if isinstance(estimate, str) else estimate), "fit_options": extra}
    n_workers = min(workers if workers is not None else usable_cores(), len(tasks))
    settings: dict[str, Any] = {
        **shaping, "criterion": criterion, "workers": n_workers,
        "scheduler": None if scheduler is None else str(getattr(scheduler, "scheduler_address", scheduler)),
        "fit_timeout": timeout, "subjects": [str(s.id) for s in chosen], "models": list(models),
        "run_dir": str(run_dir) if run_dir is not None else None,
    }

    from .rundir import RunDirectory, task_digest

    store = None
    digests: dict[tuple[str, str], str] = {}
    results: dict[tuple[str, str], FitResult] = {}
    if run_dir is not None:
        source = {"source": getattr(study, "source", None), "sha256": getattr(study, "sha256", None)}
        store = RunDirectory(run_dir, shaping, {t.name: t for t in tmpl}, resume=resume, study=source)
        digests = {task.key: task_digest(task) for task in tasks}
        if resume:
            for task in tasks:
                saved = store.load(task, digests[task.key])
                if saved is not None:
                    results[task.key] = saved
    settings["resumed"] = len(results)
    todo = [t for t in tasks if t.key not in results]
    count = {"failed": sum(not r.ok for r in results.values())}
    total = len(tasks)

    def on_outcome(outcome: Outcome) -> None:
        if store is not None:
            store.save(outcome, digests[outcome.key])
        results[outcome.key] = outcome.result
        count["failed"] += not outcome.result.ok
        if progress is not None:
            progress(len(results), total, count["failed"])

    settings["execution"] = ("dask" if scheduler is not None
                             else "processes" if n_workers > 1 and len(todo) > 1 else "serial")
    interrupted = False
    try:
        if progress is not None:
            progress(len(results), total, count["failed"])
        execute(todo, on_outcome, workers=n_workers, scheduler=scheduler)
    except KeyboardInterrupt:
        interrupted = True

    fits = tuple(results[t.key] for t in tasks if t.key in results)
    comparisons: dict[str, ModelComparison] = {}
    if len(models) > 1:
        for sid in subject_ids:
            mine = [f for f in fits if f.subject == sid]
            if mine:
                comparisons[sid] = compare_models(mine, criterion)
    return CohortResult(
        fits=fits, subjects=subject_ids, models=models, comparisons=comparisons, settings=settings, run_dir=str(run_dir) if run_dir is not None else None,
        interrupted=interrupted, n_failed=sum(not f.ok for f in fits),
    )
