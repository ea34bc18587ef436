"""The run as data: the versioned JSON document, CSV tables, and the cross-checks both use.

:func:`run_document` builds one JSON-ready dict (schema ``"compartments.fit/1"``,
described by ``schema.json`` beside this module); :func:`write_json` and
:func:`write_csv_tables` write it and the tables atomically. Numbers that are not finite
(an SE that cannot be computed, a failed fit's AIC) are written as ``null``.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..atomic import atomic_path, write_text
from ..comparison import ModelComparison
from ..exposure import Exposure, exposure, fitted_curve
from ..nca import NCAResult, nca_subject, summarize

SCHEMA = "compartments.fit/1"
SCHEMA_FILE = Path(__file__).with_name("schema.json")

#: Points of the prediction grid written to predictions.csv (per subject, model, observable).
GRID_POINTS = 121

NCA_FIELDS = ("cmax", "tmax", "auc_last", "auc_inf", "auc_extrap_pct", "lambda_z", "half_life", "cl", "vz",
              "mrt", "lambda_z_points", "lambda_z_r2_adj")


def safe_name(name: str) -> str:
    """A subject id or model name as part of a file name (letters, digits, ``-_.``; others ``_``)."""
    return "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in str(name))


# -- small numerics shared by every output ---------------------------------------------------
def finite(x: Any) -> float | None:
    """``float(x)`` or None when missing or not finite (JSON has no NaN)."""
    if x is None:
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def residual_sd(result: Any) -> float | None:
    """Root mean square of the raw residuals of quantified observations, on n − p.

    p counts the estimated structural parameters. For log-normal error the residuals
    (and so this SD) are on the log scale.
    """
    r = result.residuals
    if r is None:
        return None
    keep = ~np.asarray(r.censored, dtype=bool)
    raw = np.asarray(r.raw, dtype=float)[keep]
    dof = raw.size - len(result.parameter_names)
    if dof <= 0:
        return None
    return finite(math.sqrt(float(np.sum(raw**2)) / dof))


def residual_unit(result: Any) -> str:
    """Unit of :func:`residual_sd`: the observable's unit, or "log scale"."""
    if result.error_model == "lognormal":
        return "log scale"
    t = result.model_template
    if t is None:
        return ""
    units = {o.unit for o in t.observables}
    return units.pop() if len(units) == 1 else "observable units"


def error_parameter_unit(name: str, result: Any) -> str:
    """Unit of an error-model parameter (``sd_x``: unit of x; ``cv_x``: fraction; ``sdlog``)."""
    kind, _, obs = name.partition("_")
    if kind == "cv":
        return "fraction"
    if kind == "sdlog":
        return "log scale"
    t = result.model_template
    if t is not None and obs in t.observable_names:
        return t.observable(obs).unit
    return ""


# -- cross-checks: exposure from the curve, NCA ------------------------------------------------
@dataclass(frozen=True)
class CrossChecks:
    """Exposure of each fitted PK curve and the NCA of each single-dose subject."""

    exposures: Mapping[tuple[str, str], Exposure] = field(default_factory=dict)
    nca: Mapping[str, NCAResult] = field(default_factory=dict)
    nca_skipped: Mapping[str, str] = field(default_factory=dict)


def nca_applies(subject: Any) -> str | None:
    """None when an NCA cross-check fits the design, else the reason it does not."""
    if len(subject.doses) != 1:
        return f"{len(subject.doses)} doses (the cross-check needs a single dose)"
    names = {o for o in subject.observables}
    if len(names) > 1:
        return "several observables"
    if int(np.sum(~np.asarray(subject.censored))) < 3:
        return "fewer than 3 quantified samples"
    return None


def cross_checks(cohort: Any, study: Any) -> CrossChecks:
    """Exposure metrics of every successful PK fit and the NCA of single-dose subjects."""
    exposures: dict[tuple[str, str], Exposure] = {}
    for f in cohort.fits:
        # a pooled fit has no single dosing history to read exposure from
        e = exposure(f) if f.ok and f.subject in (f.doses or {}) else None
        if e is not None:
            exposures[(f.subject, f.template)] = e
    ncas: dict[str, NCAResult] = {}
    skipped: dict[str, str] = {}
    pk = any(getattr(f.model_template, "kind", "") == "pk" for f in cohort.fits)
    if pk and not cohort.settings.get("pooled"):
        ids = set(cohort.subjects)
        # a dose whose route the file left open takes the route the (first) model gives it
        routes = [tuple(getattr(f.model_template, "doses", {}) or ()) for f in cohort.fits if f.model_template]
        bolus = [r for r in (routes[0] if routes else ()) if r != "infusion"]
        model_route = bolus[0] if len(bolus) == 1 else None
        for s in study.subjects:
            if s.id not in ids:
                continue
            why = nca_applies(s)
            if why is None:
                ncas[s.id] = nca_subject(s, route=model_route)
            else:
                skipped[s.id] = why
    return CrossChecks(exposures, ncas, skipped)


# -- the JSON document ---------------------------------------------------------------------------
def _fit_entry(f: Any, checks: CrossChecks) -> dict[str, Any]:
    t = f.model_template
    entry: dict[str, Any] = {
        "subject": f.subject,
        "model": f.template,
        "status": f.status,
        "message": f.message or "",
        "error_model": f.error_model,
        "strategy": f.strategy,
        "seed": int(f.seed),
        "parameters": {
            n: {
                "estimate": finite(f.estimates[n]),
                "se": finite(f.se.get(n)),
                "rse": finite(f.rse.get(n)),
                "ci95": [finite(f.ci[n][0]), finite(f.ci[n][1])] if n in f.ci else [None, None],
                "unit": f.units.get(n, ""),
            }
            for n in f.parameter_names
        },
        "fixed": {n: {"value": finite(v), "unit": (t.parameter(n).unit if t is not None else "")}
                  for n, v in f.fixed.items()},
        "error_parameters": {n: {"value": finite(v), "unit": error_parameter_unit(n, f)}
                             for n, v in f.error_parameters.items()},
        "derived": {n: {"value": finite(d.value), "se": finite(d.se), "unit": d.unit, "description": d.description}
                    for n, d in f.derived.items()},
        "exposure": None,
        "objective": finite(f.objective),
        "aic": finite(f.aic),
        "aicc": finite(f.aicc),
        "bic": finite(f.bic),
        "n_obs": int(f.n_obs),
        "n_params": int(f.n_params),
        "residual_sd": residual_sd(f) if f.ok else None,
        "covariance_method": f.covariance_method,
        "correlation": {
            "parameters": list(f.parameter_names),
            "matrix": [[finite(x) for x in row] for row in np.asarray(f.correlation, dtype=float).tolist()],
        },
        "warnings": list(f.warnings),
        "alternatives": [{k: finite(v) for k, v in a.items()} for a in f.alternatives],
        "profiles": {},
        "bootstrap": None,
        "stages": [{"name": s.name, "status": s.status, "iterations": int(s.iterations),
                    "wall_time": finite(s.wall_time), "message": s.message} for s in f.stages],
        "wall_time": finite(f.wall_time),
    }
    e = checks.exposures.get((f.subject, f.template))
    if e is not None:
        entry["exposure"] = {k: ({"value": finite(v["value"]), "unit": v["unit"]} if isinstance(v, dict) else v)
                             for k, v in e.as_dict().items()}
    for name, pr in (f.profiles or {}).items():
        entry["profiles"][name] = {
            "values": [finite(x) for x in np.asarray(pr.values, dtype=float)],
            "objective": [finite(x) for x in np.asarray(pr.objective, dtype=float)],
            "ci95": [finite(pr.ci[0]), finite(pr.ci[1])],
            "threshold": finite(pr.threshold),
        }
    if f.bootstrap:
        b = f.bootstrap
        entry["bootstrap"] = {
            "replicates": int(b.get("n", 0)),
            "failed": int(b.get("failed", 0)),
            "se": {k: finite(v) for k, v in (b.get("se") or {}).items()},
            "ci95": {k: [finite(v[0]), finite(v[1])] for k, v in (b.get("ci") or {}).items()},
        }
    return entry


def _comparison_entry(c: ModelComparison) -> dict[str, Any]:
    return {
        "subject": c.subject,
        "criterion": c.criterion,
        "preferred": c.preferred,
        "runner_up": c.runner_up,
        "margin": finite(c.margin),
        "evidence": c.evidence,
        "weights": {m: finite(w) for m, w in c.weights.items()},
        "models": {m: {"aic": finite(c.aic[m]), "aicc": finite(c.aicc[m]), "bic": finite(c.bic[m]),
                       "delta": finite(c.delta[m]), "weight": finite(c.weights[m])} for m in c.models},
        "failed": dict(c.failed),
    }


def _nca_entry(sid: str, r: NCAResult) -> dict[str, Any]:
    out: dict[str, Any] = {"subject": sid, "route": r.route, "dose": finite(r.dose)}
    for k in NCA_FIELDS:
        v = getattr(r, k)
        out[k] = int(v) if k == "lambda_z_points" and v is not None else finite(v)
    out["notes"] = list(r.notes)
    return out


def _jsonable(x: Any) -> Any:
    if isinstance(x, Mapping):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, (bool, str)) or x is None:
        return x
    if isinstance(x, (int, np.integer)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        return finite(x)
    return str(x)


def run_document(cohort: Any, study: Any, settings: Mapping[str, Any],
                 checks: CrossChecks | None = None, *, created: str | None = None) -> dict[str, Any]:
    """The whole run as one JSON-ready dict (schema ``"compartments.fit/1"``).

    Parameters
    ----------
    cohort : CohortResult
    study : Study
    settings : mapping
        The options of the run (written as given, made JSON-safe).
    checks : CrossChecks, optional
        Computed with :func:`cross_checks` when not given.
    created : str, optional
        ISO time stamp; default now (UTC).

    Returns
    -------
    dict
    """
    from .. import __version__

    checks = checks if checks is not None else cross_checks(cohort, study)
    totals = study.summary_totals()
    doc: dict[str, Any] = {
        "schema": SCHEMA,
        "version": __version__,
        "created": created or _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        "input": {
            "file": study.source,
            "sha256": study.sha256,
            "subjects": int(totals["subjects"]),
            "observations": int(totals["observations"]),
            "censored": int(totals["censored"]),
            "time_unit": study.time_unit,
            "units": dict(study.units),
            "notes": [str(n) for n in study.notes],
            "skipped": list(study.skipped),
        },
        "settings": _jsonable(dict(settings)),
        "fits": [_fit_entry(f, checks) for f in cohort.fits],
        "comparison": [_comparison_entry(c) for c in cohort.comparisons.values()],
        "nca": [_nca_entry(s, r) for s, r in checks.nca.items()],
        "interrupted": bool(cohort.interrupted),
        "n_failed": int(cohort.n_failed),
        "versions": _jsonable(dict(next((f.versions for f in cohort.fits if f.versions), {}))),
    }
    return doc


def write_json(document: Mapping[str, Any], path: str | Path) -> Path:
    """Write the document atomically (UTF-8, indented, no NaN)."""
    text = json.dumps(document, indent=2, ensure_ascii=False, allow_nan=False)
    return write_text(path, text + "\n")


def load_schema() -> dict[str, Any]:
    """The JSON Schema of the document."""
    return json.loads(SCHEMA_FILE.read_text(encoding="utf-8"))


# -- CSV tables ------------------------------------------------------------------------------
def fits_frame(cohort: Any) -> pd.DataFrame:
    """One row per subject × model: status, reason, fit quality."""
    rows = []
    for f in cohort.fits:
        rows.append({"subject": f.subject, "model": f.template, "status": f.status, "message": f.message,
                     "error_model": f.error_model, "n_obs": f.n_obs, "n_params": f.n_params,
                     "neg2_log_likelihood": finite(f.objective), "aic": finite(f.aic), "aicc": finite(f.aicc),
                     "bic": finite(f.bic), "residual_sd": residual_sd(f) if f.ok else None,
                     "warnings": " | ".join(f.warnings)})
    return pd.DataFrame(rows, columns=["subject", "model", "status", "message", "error_model", "n_obs", "n_params",
                                       "neg2_log_likelihood", "aic", "aicc", "bic", "residual_sd", "warnings"])


def parameters_long(cohort: Any) -> pd.DataFrame:
    """One row per subject × model × parameter (estimated, fixed and error-model).

    The profile-likelihood and bootstrap columns are filled for estimated parameters when
    those were computed (``--profile``, ``--bootstrap N``); an empty profile end was not
    reached within the template's bounds.
    """
    rows = []
    for f in cohort.fits:
        boot = f.bootstrap or {}
        for n in f.parameter_names:
            lo, hi = f.ci.get(n, (None, None))
            prof = (f.profiles or {}).get(n)
            plo, phi = prof.ci if prof is not None else (None, None)
            blo, bhi = (boot.get("ci") or {}).get(n, (None, None))
            rows.append({"subject": f.subject, "model": f.template, "parameter": n, "kind": "estimated",
                         "estimate": finite(f.estimates[n]), "se": finite(f.se.get(n)), "rse_pct": finite(f.rse.get(n)),
                         "ci95_low": finite(lo), "ci95_high": finite(hi), "unit": f.units.get(n, ""),
                         "profile_ci95_low": finite(plo), "profile_ci95_high": finite(phi),
                         "bootstrap_se": finite((boot.get("se") or {}).get(n)),
                         "bootstrap_ci95_low": finite(blo), "bootstrap_ci95_high": finite(bhi)})
        t = f.model_template
        for n, v in f.fixed.items():
            rows.append({"subject": f.subject, "model": f.template, "parameter": n, "kind": "fixed",
                         "estimate": finite(v), "se": None, "rse_pct": None, "ci95_low": None, "ci95_high": None,
                         "unit": t.parameter(n).unit if t is not None else ""})
        for n, v in f.error_parameters.items():
            rows.append({"subject": f.subject, "model": f.template, "parameter": n, "kind": "error model",
                         "estimate": finite(v), "se": None, "rse_pct": None, "ci95_low": None, "ci95_high": None,
                         "unit": error_parameter_unit(n, f)})
    return pd.DataFrame(rows, columns=["subject", "model", "parameter", "kind", "estimate", "se", "rse_pct",
                                       "ci95_low", "ci95_high", "unit", "profile_ci95_low", "profile_ci95_high",
                                       "bootstrap_se", "bootstrap_ci95_low", "bootstrap_ci95_high"])


def parameters_wide(cohort: Any) -> pd.DataFrame:
    """One row per subject × model; one column per estimated parameter, headed ``name (unit)``."""
    cols: dict[str, None] = {}
    rows = []
    for f in cohort.fits:
        row: dict[str, Any] = {"subject": f.subject, "model": f.template, "status": f.status}
        for n in f.parameter_names:
            key = f"{n} ({f.units.get(n, '')})" if f.units.get(n) else n
            cols.setdefault(key, None)
            row[key] = finite(f.estimates[n])
        rows.append(row)
    return pd.DataFrame(rows, columns=["subject", "model", "status", *cols])


def derived_frame(cohort: Any, checks: CrossChecks) -> pd.DataFrame:
    """Derived quantities of the templates and exposure from the fitted curves."""
    rows = []
    for f in cohort.fits:
        for n, d in f.derived.items():
            rows.append({"subject": f.subject, "model": f.template, "quantity": n, "value": finite(d.value),
                         "se": finite(d.se), "unit": d.unit, "source": "template", "description": d.description})
        e = checks.exposures.get((f.subject, f.template))
        if e is not None:
            for k, v in e.as_dict().items():
                if isinstance(v, dict):
                    rows.append({"subject": f.subject, "model": f.template, "quantity": k, "value": finite(v["value"]),
                                 "se": None, "unit": v["unit"], "source": "fitted curve", "description": ""})
    return pd.DataFrame(rows, columns=["subject", "model", "quantity", "value", "se", "unit", "source", "description"])


def comparison_frame(cohort: Any) -> pd.DataFrame:
    """One row per subject × model with AIC, AICc, BIC, Δ, weight and preference."""
    rows = []
    for sid, c in cohort.comparisons.items():
        for m in c.models:
            rows.append({"subject": sid, "model": m, "status": "ok", "aic": finite(c.aic[m]), "aicc": finite(c.aicc[m]),
                         "bic": finite(c.bic[m]), "criterion": c.criterion, "delta": finite(c.delta[m]),
                         "weight": finite(c.weights[m]), "preferred": m == c.preferred, "reason": ""})
        for m, why in c.failed.items():
            rows.append({"subject": sid, "model": m, "status": "failed", "aic": None, "aicc": None, "bic": None,
                         "criterion": c.criterion, "delta": None, "weight": None, "preferred": False, "reason": why})
    return pd.DataFrame(rows, columns=["subject", "model", "status", "aic", "aicc", "bic", "criterion", "delta",
                                       "weight", "preferred", "reason"])


def residuals_frame(cohort: Any) -> pd.DataFrame:
    """Every observation of every successful fit: observed, predicted, residuals."""
    frames = []
    for f in cohort.fits:
        r = f.residuals
        if r is None:
            continue
        frames.append(pd.DataFrame({
            "subject": list(r.subject), "model": f.template, "observable": list(r.observable),
            "time": r.time, "observed": r.observed, "predicted": r.predicted, "censored": r.censored,
            "residual": r.raw, "weighted_residual": r.weighted,
        }))
    cols = ["subject", "model", "observable", "time", "observed", "predicted", "censored", "residual",
            "weighted_residual"]
    return pd.concat(frames, ignore_index=True)[cols] if frames else pd.DataFrame(columns=cols)


def prediction_grid(result: Any, subject: str, points: int = GRID_POINTS) -> np.ndarray:
    """An even time grid from 0 to a little past the last sample of ``subject``, with dose times."""
    r = result.residuals
    times = [float(t) for s, t in zip(r.subject, r.time, strict=True) if s == subject] if r is not None else []
    doses = [float(d.time) for d in result.doses.get(subject, ())]
    end = max(times + doses + [0.0]) * 1.04 or 1.0
    grid = np.union1d(np.linspace(0.0, end, points), np.array(doses, dtype=float))
    return grid


def predictions_frame(cohort: Any, points: int = GRID_POINTS) -> pd.DataFrame:
    """Each fitted curve on a fine grid with its 95 % confidence band."""
    frames = []
    for f in cohort.fits:
        if not f.ok or f.model_template is None:
            continue
        for sid in (f.doses or {f.subject: ()}):
            grid = prediction_grid(f, sid, points)
            for obs in f.model_template.observable_names:
                c = fitted_curve(f, grid, subject=sid, observable=obs)
                frames.append(pd.DataFrame({"subject": sid, "model": f.template, "observable": obs, "time": c.times,
                                            "predicted": c.predicted, "lower95": c.lower, "upper95": c.upper}))
    cols = ["subject", "model", "observable", "time", "predicted", "lower95", "upper95"]
    return pd.concat(frames, ignore_index=True)[cols] if frames else pd.DataFrame(columns=cols)


def nca_frame(checks: CrossChecks) -> pd.DataFrame:
    """One row per subject analysed by NCA."""
    rows = [_nca_entry(s, r) for s, r in checks.nca.items()]
    for row in rows:
        row["notes"] = " | ".join(row["notes"])
    return pd.DataFrame(rows, columns=["subject", "route", "dose", *NCA_FIELDS, "notes"])


def nca_summary_frame(results: Mapping[str, NCAResult]) -> pd.DataFrame:
    """Descriptive statistics of the NCA quantities across subjects."""
    s = summarize(results)
    return pd.DataFrame([{"quantity": q, **{k: finite(v) if k != "n" else v for k, v in stats.items()}}
                         for q, stats in s.items()])


def write_frame(frame: pd.DataFrame, path: str | Path) -> Path:
    """Write one CSV atomically."""
    with atomic_path(path) as tmp:
        frame.to_csv(tmp, index=False)
    return Path(path)


def write_csv_tables(cohort: Any, out_dir: str | Path, checks: CrossChecks | None = None,
                     predictions: pd.DataFrame | None = None) -> list[Path]:
    """Write the CSV tables into ``out_dir`` (which must exist); return the paths written.

    Files: ``fits.csv``, ``parameters_long.csv``, ``parameters_wide.csv``, ``derived.csv``,
    ``comparison.csv`` (several models), ``predictions.csv``, ``residuals.csv`` and, when
    the design allows it, ``nca.csv``.
    """
    out = Path(out_dir)
    checks = checks if checks is not None else CrossChecks()
    tables: list[tuple[str, pd.DataFrame]] = [
        ("fits.csv", fits_frame(cohort)),
        ("parameters_long.csv", parameters_long(cohort)),
        ("parameters_wide.csv", parameters_wide(cohort)),
        ("derived.csv", derived_frame(cohort, checks)),
    ]
    if cohort.comparisons:
        tables.append(("comparison.csv", comparison_frame(cohort)))
    tables.append(("predictions.csv", predictions if predictions is not None else predictions_frame(cohort)))
    tables.append(("residuals.csv", residuals_frame(cohort)))
    if checks.nca:
        tables.append(("nca.csv", nca_frame(checks)))
    return [write_frame(frame, out / name) for name, frame in tables]


def comparisons_of(fits: Sequence[Any], criterion: str = "aic") -> dict[str, ModelComparison]:
    """Per-subject comparisons of the models in ``fits`` (only subjects with several models)."""
    from ..comparison import compare_models

    by: dict[str, list[Any]] = {}
    for f in fits:
        by.setdefault(f.subject, []).append(f)
    return {s: compare_models(fs, criterion) for s, fs in by.items() if len(fs) > 1}
