"""The run directory: one file per finished subject × model fit, so a run can resume.

Layout::

    RUN_DIR/run.json                      what the run is (settings that shape the results)
    RUN_DIR/fits/<subject>__<model>__<h>.pickle   the FitResult (pickle)
    RUN_DIR/fits/<subject>__<model>__<h>.json     a small record; written last, so it
                                                  marks the fit as finished

Every file is written atomically (:mod:`compartments.atomic`), so an interrupted run
leaves whole files only. Each record carries a digest of the fit's inputs (the subject's
data, the template, the fit settings and seed); resuming reuses a saved fit only when
the digest matches and stops with one clear error when the directory was made from
other settings, data or templates.

The pickles are read back on resume: resume only run directories you made yourself.
"""

from __future__ import annotations

import hashlib
import json
import pickle
import re
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from .atomic import write_bytes, write_text
from .errors import UsageError
from .execution import Outcome, Task
from .results import FitResult
from .template import Template

__all__ = ["RunDirectory", "task_digest", "template_digest"]

SCHEMA = "compartments.run/1"
RECORD_SCHEMA = "compartments.run-fit/1"
_UNSAFE = re.compile(r"[^A-Za-z0-9_.-]+")


def template_digest(template: Template) -> str:
    """SHA-256 of everything in a template that shapes a fit.

    Examples
    --------
    >>> from compartments import load_template
    >>> template_digest(load_template("one-comp-oral")) == template_digest(load_template("one-comp-oral"))
    True
    """
    parts = [template.name, template.kind, template.time_unit, repr(sorted(dict(template.settings).items()))]
    parts += [repr(s) for s in template.states] + [repr(p) for p in template.parameters]
    parts += [f"{k}={template.equations[k]}" for k in template.state_names]
    parts += [f"{k}:{v!r}" for k, v in sorted(dict(template.doses).items())]
    parts += [repr(o) for o in template.observables] + [repr(d) for d in template.derived]
    return hashlib.sha256("\n".join(parts).encode("utf-8")).hexdigest()


def _canonical(value: Any) -> Any:
    """Plain JSON-able form of settings (tuples as lists, numbers as floats)."""
    if isinstance(value, Mapping):
        return {str(k): _canonical(v) for k, v in sorted(value.items(), key=lambda kv: str(kv[0]))}
    if isinstance(value, (list, tuple)):
        return [_canonical(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value)
    return repr(value)


def task_digest(task: Task) -> str:
    """SHA-256 of a task's inputs: subject data, template, fit settings and seed."""
    h = hashlib.sha256()
    h.update(template_digest(task.template).encode())
    h.update(json.dumps(_canonical(dict(task.options)), sort_keys=True).encode())
    h.update(f"pooled={task.pooled}".encode())
    for subject in task.subjects():
        h.update(str(subject.id).encode())
        for name in ("times", "values", "censored", "lloq"):
            arr = getattr(subject, name, None)
            if arr is not None:
                h.update(np.ascontiguousarray(np.asarray(arr)).tobytes())
        h.update(repr(tuple(getattr(subject, "observables", ()))).encode())
        h.update(repr(tuple(getattr(subject, "doses", ()))).encode())
        h.update(repr(sorted((str(k), repr(v)) for k, v in dict(getattr(subject, "covariates", {})).items())).encode())
    return h.hexdigest()


def _stem(subject: str, model: str) -> str:
    tag = hashlib.sha256(f"{subject}\x00{model}".encode()).hexdigest()[:10]
    return f"{_UNSAFE.sub('_', subject)[:40]}__{_UNSAFE.sub('_', model)[:40]}__{tag}"


class RunDirectory:
    """A run directory opened for a new run or to resume one.

    Parameters
    ----------
    path : str or Path
        A new or empty folder (its parent must exist), or with ``resume`` a folder made
        by an earlier run.
    settings : Mapping
        The settings that shape the results (error model, strategy, seed, ...); a
        resumed run must have the same.
    templates : mapping of str to Template
        The run's templates by name; a resumed run must not change a template it shares
        with the earlier run.
    resume : bool
        Continue the run saved in ``path``.

    Raises
    ------
    UsageError
        The folder cannot be used as asked (with what to do).
    """

    def __init__(self, path: str | Path, settings: Mapping[str, Any], templates: Mapping[str, Template],
                 *, resume: bool = False, study: Mapping[str, Any] | None = None):
        self.path = Path(path)
        self.settings = _canonical(dict(settings))
        self.templates = {name: template_digest(t) for name, t in templates.items()}
        self.fits = self.path / "fits"
        info = self.path / "run.json"
        self._saved: dict[str, Any] = {}
        if resume:
            self._check_resume(info)
        else:
            self._check_new(info)
        now = datetime.now(UTC).isoformat(timespec="seconds")
        record = {
            "schema": SCHEMA,
            "created": self._saved.get("created", now),
            "resumed": [*self._saved.get("resumed", []), now] if resume else [],
            "settings": self.settings,
            "templates": {**self._saved.get("templates", {}), **self.templates},
            "study": _canonical(dict(study or {})),
        }
        self.fits.mkdir(exist_ok=True)
        write_text(info, json.dumps(record, indent=2) + "\n")

    def _check_new(self, info: Path) -> None:
        if self.path.exists():
            if not self.path.is_dir():
                raise UsageError(f"{self.path} is a file, not a folder; choose a folder for the run")
            if info.exists():
                raise UsageError(f"{self.path} already holds a run; resume it (resume=True, --resume {self.path}) "
                                 "or choose a new folder")
            if any(self.path.iterdir()):
                raise UsageError(f"{self.path} is not empty and holds no run; choose a new or empty folder")
        else:
            if not self.path.parent.exists():
                raise UsageError(f"{self.path}: folder {self.path.parent} does not exist; create it first")
            self.path.mkdir()

    def _check_resume(self, info: Path) -> None:
        if not info.is_file():
            raise UsageError(f"{self.path} holds no run to resume (no run.json); check the folder, "
                             "or start a new run there without resume")
        try:
            saved = json.loads(info.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise UsageError(f"{info} cannot be read ({exc}); start a new run directory") from None
        if not isinstance(saved, dict) or saved.get("schema") != SCHEMA:
            raise UsageError(f"{info} is not a compartments run record ({SCHEMA}); start a new run directory")
        old = saved.get("settings", {})
        diff = [f"{k}={old.get(k)!r} there, {v!r} now" for k, v in self.settings.items() if old.get(k) != v]
        diff += [f"{k}={old[k]!r} there, not set now" for k in old if k not in self.settings]
        if diff:
            raise UsageError(f"{self.path} was run with other settings ({'; '.join(diff)}); resume with the "
                             "same settings or start a new run directory")
        old_templates = dict(saved.get("templates", {}))
        changed = [n for n, d in self.templates.items() if n in old_templates and old_templates[n] != d]
        if changed:
            raise UsageError(f"{self.path}: template {', '.join(changed)} differs from the one the run used; "
                             "resume with the same template files or start a new run directory")
        self._saved = {"created": saved.get("created"), "resumed": list(saved.get("resumed", [])),
                       "templates": old_templates}

    def load(self, task: Task, digest: str) -> FitResult | None:
        """The saved result of ``task`` if it finished for good, else None.

        Raises
        ------
        UsageError
            A result for this subject × model was made from other inputs.
        """
        stem = _stem(task.subject, task.model)
        record_path = self.fits / f"{stem}.json"
        if not record_path.is_file():
            return None
        try:
            record = json.loads(record_path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        if record.get("digest") != digest:
            raise UsageError(
                f"{self.path}: the saved fit of subject {task.subject} with {task.model} was made from other data "
                "or settings; resume only with the same study, subjects' data and templates, or start a new run directory"
            )
        if not record.get("final", False):
            return None
        try:
            result = pickle.loads((self.fits / f"{stem}.pickle").read_bytes())
        except Exception:  # a damaged file: fit again
            return None
        return result if isinstance(result, FitResult) else None

    def save(self, outcome: Outcome, digest: str) -> None:
        """Write one outcome: the pickle first, then the record that marks it finished."""
        stem = _stem(outcome.subject, outcome.model)
        r = outcome.result
        write_bytes(self.fits / f"{stem}.pickle", pickle.dumps(r, protocol=pickle.HIGHEST_PROTOCOL))
        record = {
            "schema": RECORD_SCHEMA,
            "subject": outcome.subject,
            "model": outcome.model,
            "status": r.status,
            "message": r.message,
            "final": bool(outcome.final),
            "digest": digest,
            "seed": int(r.seed),
            "aic": float(r.aic) if np.isfinite(r.aic) else None,
            "wall_time": float(r.wall_time),
        }
        write_text(self.fits / f"{stem}.json", json.dumps(record, indent=2) + "\n")
