"""Summaries across subjects: model preference, parameter distributions, groups, covariates.

Numbers only (numpy, pandas, scipy); the rich tables and plots are in
:mod:`compartments.report.cohort`. Every function takes fits — :class:`FitResult` s from
a cohort run or :class:`FitRecord` s read back from a saved run document — and returns a
:class:`pandas.DataFrame`.

Conventions
-----------
- Geometric statistics on the log scale: geometric mean ``exp(mean(ln x))``, geometric
  CV % ``100·sqrt(exp(s²) − 1)`` with ``s`` the SD of ``ln x`` (common practice for
  log-normally distributed PK parameters).
- Outlying subjects: beyond 3 robust SD from the median on the log scale, the robust SD
  being ``1.4826·MAD`` (``scipy.stats.median_abs_deviation(scale="normal")``).
- Group tests (Mann–Whitney U for two groups, Kruskal–Wallis for more) and Spearman
  correlations are exploratory: p-values are not adjusted for the many parameters and
  covariates tried, and the fits they rest on carry their own uncertainty.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from numbers import Real
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from .comparison import compare_models

__all__ = [
    "EXPLORATORY",
    "as_record",
    "FitRecord",
    "Quantity",
    "covariate_correlations",
    "describe",
    "failures",
    "fits_from_document",
    "group_summary",
    "group_tests",
    "model_preference",
    "numeric_covariates",
    "parameter_summary",
    "parameter_table",
    "pool_runs",
    "study_covariates",
    "subject_comparisons",
]

#: The label that goes with every p-value in this module.
EXPLORATORY = ("exploratory: not adjusted for the number of parameters and covariates tested, "
               "and blind to each estimate's own uncertainty")
OUTLIER_SDS = 3.0

SUMMARY_COLUMNS = ["kind", "unit", "n", "geo_mean", "geo_cv_percent", "median", "min", "max", "mean", "sd", "outlying"]


# --------------------------------------------------------------------------- inputs


@dataclass(frozen=True)
class Quantity:
    """A derived value read back from a document (``value`` and ``unit``)."""

    value: float
    unit: str = ""


@dataclass(frozen=True)
class FitRecord:
    """The parts of a fit the summaries use, as read back from a saved run document.

    Attributes mirror :class:`~compartments.results.FitResult`.
    """

    subject: str
    template: str
    status: str
    message: str = ""
    estimates: Mapping[str, float] = field(default_factory=dict)
    units: Mapping[str, str] = field(default_factory=dict)
    derived: Mapping[str, Quantity] = field(default_factory=dict)
    aic: float = math.nan
    aicc: float = math.nan
    bic: float = math.nan
    n_obs: int = 0

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    @property
    def parameter_names(self) -> tuple[str, ...]:
        return tuple(self.estimates)


def _number(x: Any) -> float:
    try:
        return float(x) if x is not None else math.nan
    except (TypeError, ValueError):
        return math.nan


def fits_from_document(doc: Mapping[str, Any], prefix: str = "") -> list[FitRecord]:
    """Fits of a ``compartments.fit/1`` document (as parsed from JSON).

    Parameters
    ----------
    doc : mapping
        The parsed document.
    prefix : str
        Put before each subject id (``"armA:"``) so that runs can be pooled.

    Examples
    --------
    >>> doc = {"fits": [{"subject": "1", "model": "m", "status": "ok", "aic": 3.0,
    ...         "parameters": {"ke": {"estimate": 0.1, "unit": "1/h"}},
    ...         "derived": {"CL": {"estimate": 2.0, "unit": "L/h"}}}]}
    >>> r = fits_from_document(doc)[0]
    >>> r.estimates["ke"], r.derived["CL"].value, r.ok
    (0.1, 2.0, True)
    """
    out = []
    for f in doc.get("fits", []) or []:
        params = f.get("parameters", {}) or {}
        derived = f.get("derived", {}) or {}
        out.append(FitRecord(
            subject=f"{prefix}{f.get('subject', '')}",
            template=str(f.get("model", f.get("template", ""))),
            status=str(f.get("status", "failed")),
            message=str(f.get("message", "") or ""),
            estimates={k: _number(v.get("estimate") if isinstance(v, Mapping) else v) for k, v in params.items()},
            units={k: str(v.get("unit", "")) if isinstance(v, Mapping) else "" for k, v in params.items()},
            derived={k: Quantity(_number(v.get("estimate", v.get("value")) if isinstance(v, Mapping) else v),
                                 str(v.get("unit", "")) if isinstance(v, Mapping) else "")
                     for k, v in derived.items()},
            aic=_number(f.get("aic")), aicc=_number(f.get("aicc")), bic=_number(f.get("bic")),
            n_obs=int(_number(f.get("n_obs")) if math.isfinite(_number(f.get("n_obs"))) else 0),
        ))
    return out


def as_record(fit: Any, prefix: str = "") -> FitRecord:
    """A :class:`FitRecord` of any fit (a :class:`FitResult` or a record), subject id prefixed."""
    return FitRecord(
        subject=f"{prefix}{fit.subject}", template=fit.template, status=fit.status, message=fit.message,
        estimates=dict(fit.estimates), units=dict(fit.units),
        derived={k: Quantity(float(d.value), getattr(d, "unit", "")) for k, d in fit.derived.items()},
        aic=float(fit.aic), aicc=float(fit.aicc), bic=float(fit.bic), n_obs=int(fit.n_obs),
    )


def pool_runs(runs: Mapping[str, Any], covariate: str = "run") -> tuple[list[FitRecord], dict[str, dict[str, object]]]:
    """The fits of several runs as one cohort, to compare the runs like groups.

    Parameters
    ----------
    runs : mapping of str to (CohortResult or sequence of fits)
        Run label -> its fits.
    covariate : str
        Name of the covariate that holds each fit's run label.

    Returns
    -------
    fits : list of FitRecord
        Subject ids prefixed ``"label:"`` so that subjects of different runs stay apart.
    covariates : dict
        Prefixed subject id -> ``{covariate: label}``.

    Examples
    --------
    >>> fits, cov = pool_runs({"A": [FitRecord("1", "m", "ok")], "B": [FitRecord("1", "m", "ok")]})
    >>> [f.subject for f in fits], cov["B:1"]
    (['A:1', 'B:1'], {'run': 'B'})
    """
    fits: list[FitRecord] = []
    cov: dict[str, dict[str, object]] = {}
    for label, source in runs.items():
        for f in _fits(source):
            r = as_record(f, prefix=f"{label}:")
            fits.append(r)
            cov[r.subject] = {covariate: str(label)}
    return fits, cov


def _fits(source: Any) -> list[Any]:
    """Fits from a CohortResult, or a sequence of fits."""
    return list(source.fits) if hasattr(source, "fits") else list(source)


def study_covariates(study: Any) -> dict[str, dict[str, object]]:
    """Subject id -> covariates, from a Study (or a list of subjects)."""
    subjects = study.subjects if hasattr(study, "subjects") else study
    return {str(s.id): dict(s.covariates) for s in subjects}


def _covariates(covariates: Any) -> dict[str, dict[str, object]]:
    """Subject id -> covariates from a Study, a list of subjects or a mapping."""
    if hasattr(covariates, "subjects"):
        return study_covariates(covariates)
    if isinstance(covariates, (list, tuple)) and all(hasattr(s, "covariates") for s in covariates):
        return study_covariates(covariates)
    return {str(k): dict(v) for k, v in dict(covariates or {}).items()}


def _missing(v: object) -> bool:
    return v is None or (isinstance(v, float) and math.isnan(v)) or (isinstance(v, str) and not v.strip())


def _numeric(v: object) -> bool:
    return isinstance(v, (Real, np.number)) and not isinstance(v, (bool, np.bool_)) and math.isfinite(float(v))


# --------------------------------------------------------------------------- per parameter


def parameter_table(fits: Any, model: str, *, derived: bool = True) -> pd.DataFrame:
    """One row per successfully fitted subject, one column per estimate of ``model``.

    Derived quantities (half-lives, clearance, ...) follow the parameters when
    ``derived``. ``attrs["units"]`` and ``attrs["kinds"]`` give each column's unit and
    kind (``"parameter"`` or ``"derived"``).
    """
    rows: dict[str, dict[str, float]] = {}
    units: dict[str, str] = {}
    kinds: dict[str, str] = {}
    for f in _fits(fits):
        if f.template != model or not f.ok:
            continue
        row = {k: float(v) for k, v in f.estimates.items()}
        for k in f.estimates:
            units.setdefault(k, f.units.get(k, ""))
            kinds.setdefault(k, "parameter")
        if derived:
            for k, d in f.derived.items():
                if k in row:
                    continue
                row[k] = float(d.value)
                units.setdefault(k, d.unit)
                kinds.setdefault(k, "derived")
        rows[str(f.subject)] = row
    order = [k for k in kinds if kinds[k] == "parameter"] + [k for k in kinds if kinds[k] == "derived"]
    table = pd.DataFrame.from_dict(rows, orient="index", columns=order) if rows else pd.DataFrame(columns=order)
    table.index.name = "subject"
    table.attrs["units"] = units
    table.attrs["kinds"] = kinds
    table.attrs["model"] = model
    return table


def describe(values: Sequence[float], subjects: Sequence[str] | None = None) -> dict[str, Any]:
    """n, geometric mean and CV %, median, min, max, mean, SD and outlying subjects.

    ``outlying`` lists (comma-separated) the subjects beyond 3 robust SD from the median
    on the log scale.

    Non-finite values are left out. Geometric statistics and outliers need positive
    values; they are nan (and no outliers) otherwise.

    Examples
    --------
    >>> d = describe([1.0, 2.0, 4.0])
    >>> round(d["geo_mean"], 6), d["median"], d["n"]
    (2.0, 2.0, 3)
    """
    x = np.asarray(values, dtype=float)
    ids = list(subjects) if subjects is not None else [str(i) for i in range(x.size)]
    keep = np.isfinite(x)
    x = x[keep]
    ids = [s for s, k in zip(ids, keep, strict=True) if k]
    nan = math.nan
    out: dict[str, Any] = {"n": int(x.size), "geo_mean": nan, "geo_cv_percent": nan, "median": nan, "min": nan,
                           "max": nan, "mean": nan, "sd": nan, "outlying": ""}
    if x.size == 0:
        return out
    out.update(median=float(np.median(x)), min=float(x.min()), max=float(x.max()), mean=float(x.mean()),
               sd=float(x.std(ddof=1)) if x.size > 1 else nan)
    if np.all(x > 0):
        logs = np.log(x)
        out["geo_mean"] = float(np.exp(logs.mean()))
        if x.size > 1:
            s = float(logs.std(ddof=1))
            out["geo_cv_percent"] = float(100.0 * math.sqrt(math.expm1(s * s)))
        if x.size >= 3:
            centre = float(np.median(logs))
            robust_sd = float(stats.median_abs_deviation(logs, scale="normal"))
            if robust_sd > 0:
                far = np.abs(logs - centre) > OUTLIER_SDS * robust_sd
                out["outlying"] = ", ".join(s for s, f in zip(ids, far, strict=True) if f)
    return out


def _summary_frame(table: pd.DataFrame) -> pd.DataFrame:
    records = []
    for name in table.columns:
        d = describe(table[name].to_numpy(dtype=float), [str(i) for i in table.index])
        records.append({"parameter": name, "kind": table.attrs["kinds"].get(name, ""),
                        "unit": table.attrs["units"].get(name, ""), **d})
    frame = pd.DataFrame.from_records(records, columns=["parameter"] + SUMMARY_COLUMNS)
    return frame.set_index("parameter")


def parameter_summary(fits: Any, model: str, *, derived: bool = True) -> pd.DataFrame:
    """Each parameter (and derived quantity) of ``model`` across the subjects fitted.

    Returns
    -------
    pandas.DataFrame
        Indexed by parameter; columns ``kind``, ``unit``, ``n``, ``geo_mean``,
        ``geo_cv_percent``, ``median``, ``min``, ``max``, ``mean``, ``sd``, ``outlying``
        (the ids of subjects beyond 3 robust SD on the log scale, comma-separated; empty
        when none). Failed fits are left out.

    Examples
    --------
    >>> recs = [FitRecord(str(i), "m", "ok", estimates={"ke": v}) for i, v in enumerate([0.1, 0.2, 0.4])]
    >>> round(float(parameter_summary(recs, "m").loc["ke", "geo_mean"]), 6)
    0.2
    """
    out = _summary_frame(parameter_table(fits, model, derived=derived))
    out.attrs["model"] = model
    return out


# --------------------------------------------------------------------------- models


def _by_subject(fits: list[Any]) -> dict[str, list[Any]]:
    groups: dict[str, list[Any]] = {}
    for f in fits:
        groups.setdefault(str(f.subject), []).append(f)
    return groups


def _models(fits: list[Any]) -> list[str]:
    return list(dict.fromkeys(f.template for f in fits))


def subject_comparisons(source: Any, criterion: str = "aic") -> pd.DataFrame:
    """Per subject: the preferred model, the runner-up, the margin and each model's weight.

    Returns
    -------
    pandas.DataFrame
        Indexed by subject; columns ``preferred``, ``runner_up``, ``margin`` (criterion
        difference), ``evidence`` (plain words), ``failed`` (models that could not be
        fitted), then one column per model with its Akaike-type weight.
    """
    fits = _fits(source)
    models = _models(fits)
    rows = []
    for subject, mine in _by_subject(fits).items():
        c = compare_models(mine, criterion)
        rows.append({"subject": subject, "preferred": c.preferred, "runner_up": c.runner_up, "margin": c.margin,
                     "evidence": c.evidence, "failed": ", ".join(c.failed),
                     **{m: c.weights.get(m, math.nan) for m in models}})
    frame = pd.DataFrame.from_records(rows, columns=["subject", "preferred", "runner_up", "margin", "evidence",
                                                     "failed", *models]).set_index("subject")
    frame.attrs["criterion"] = criterion
    frame.attrs["models"] = models
    return frame


def model_preference(source: Any, criterion: str = "aic") -> pd.DataFrame:
    """How often each model is preferred across subjects, and its summed criterion.

    Parameters
    ----------
    source : CohortResult or sequence of fits
    criterion : {"aic", "aicc", "bic"}

    Returns
    -------
    pandas.DataFrame
        Indexed by model: ``fitted`` and ``failed`` (counts), ``preferred`` (number of
        subjects where the model has the lowest criterion), ``share`` (of the subjects
        with any model fitted), ``mean_weight`` (mean Akaike-type weight), ``summed`` and
        ``delta_summed`` (the criterion summed over the ``n_common`` subjects where every
        model was fitted, and its difference from the lowest sum), ``failed_subjects``
        (comma-separated ids).

    Examples
    --------
    >>> a = [FitRecord(s, "a", "ok", aic=v) for s, v in (("1", 10.0), ("2", 12.0))]
    >>> b = [FitRecord(s, "b", "ok", aic=v) for s, v in (("1", 11.0), ("2", 20.0))]
    >>> t = model_preference(a + b)
    >>> int(t.loc["a", "preferred"]), float(t.loc["b", "delta_summed"])
    (2, 9.0)
    """
    fits = _fits(source)
    models = _models(fits)
    by_subject = _by_subject(fits)
    comps = {s: compare_models(mine, criterion) for s, mine in by_subject.items()}
    decided = [c for c in comps.values() if c.preferred is not None]
    common = [s for s, c in comps.items() if all(m in c.models for m in models)]
    in_common = set(common)
    rows = []
    for m in models:
        mine = [f for f in fits if f.template == m]
        ok = [f for f in mine if f.ok and math.isfinite(float(getattr(f, criterion)))]
        ok_ids = {id(f) for f in ok}
        weights = [c.weights[m] for c in decided if m in c.weights]
        summed = sum(float(getattr(f, criterion)) for f in ok if str(f.subject) in in_common) if common else math.nan
        rows.append({"model": m, "fitted": len(ok), "failed": len(mine) - len(ok),
                     "preferred": sum(c.preferred == m for c in decided),
                     "share": (sum(c.preferred == m for c in decided) / len(decided)) if decided else math.nan,
                     "mean_weight": float(np.mean(weights)) if weights else math.nan,
                     "summed": summed, "n_common": len(common),
                     "failed_subjects": ", ".join(str(f.subject) for f in mine if id(f) not in ok_ids)})
    frame = pd.DataFrame.from_records(rows, columns=["model", "fitted", "failed", "preferred", "share", "mean_weight",
                                                     "summed", "delta_summed", "n_common", "failed_subjects"])
    frame = frame.set_index("model")
    if frame["summed"].notna().any():
        frame["delta_summed"] = frame["summed"] - frame["summed"].min()
    frame.attrs["criterion"] = criterion
    frame.attrs["subjects"] = len(by_subject)
    return frame


def failures(source: Any) -> pd.DataFrame:
    """Every failed fit: subject, model and the reason."""
    rows = [{"subject": str(f.subject), "model": f.template, "reason": f.message} for f in _fits(source) if not f.ok]
    return pd.DataFrame.from_records(rows, columns=["subject", "model", "reason"])


# --------------------------------------------------------------------------- groups


def _group_labels(covariates: Any, group_by: str, subjects: Iterable[str]) -> dict[str, str]:
    cov = _covariates(covariates)
    if not any(group_by in c for c in cov.values()):
        names = sorted({k for c in cov.values() for k in c})
        raise KeyError(f"no covariate {group_by!r}; covariates are {', '.join(names) or 'none'}")
    out = {}
    for s in subjects:
        v = cov.get(s, {}).get(group_by)
        if not _missing(v):
            out[s] = f"{v:g}" if _numeric(v) else str(v)
    return out


def _groups_sorted(labels: Iterable[str]) -> list[str]:
    uniq = list(dict.fromkeys(labels))
    try:
        return sorted(uniq, key=float)
    except ValueError:
        return sorted(uniq)


def _ordered(labels: Iterable[str], order: Sequence[str] | None) -> list[str]:
    present = list(dict.fromkeys(labels))
    if order is None:
        return _groups_sorted(present)
    return [str(g) for g in order if str(g) in present] + [g for g in _groups_sorted(present) if g not in order]


def group_summary(fits: Any, covariates: Any, group_by: str, model: str, *, derived: bool = True,
                  order: Sequence[str] | None = None) -> pd.DataFrame:
    """:func:`parameter_summary` within each group of the covariate ``group_by``.

    Returns
    -------
    pandas.DataFrame
        Indexed by (group, parameter), with the columns of :func:`parameter_summary`.
        Subjects without a value of ``group_by`` are left out. Groups in ``order`` when
        given, else sorted (numerically when they are numbers).

    Raises
    ------
    KeyError
        No subject has the covariate ``group_by``.
    """
    table = parameter_table(fits, model, derived=derived)
    labels = _group_labels(covariates, group_by, table.index)
    frames = []
    for g in _ordered(labels.values(), order):
        part = table.loc[[s for s in table.index if labels.get(s) == g]]
        part.attrs = dict(table.attrs)
        frames.append(pd.concat({g: _summary_frame(part)}, names=[group_by]))
    if not frames:
        return pd.DataFrame(columns=SUMMARY_COLUMNS)
    out = pd.concat(frames)
    out.attrs.update(model=model, group_by=group_by)
    return out


def group_tests(fits: Any, covariates: Any, group_by: str, model: str, *, derived: bool = True,
                order: Sequence[str] | None = None) -> pd.DataFrame:
    """Per parameter, do the groups of ``group_by`` differ? (exploratory)

    Mann–Whitney U (two-sided) for two groups, Kruskal–Wallis H for more
    (``scipy.stats.mannwhitneyu`` / ``scipy.stats.kruskal``). Groups with fewer than two
    subjects take no part; with fewer than two such groups there is no test (``test``
    says "one group only" or "too few subjects per group").

    Returns
    -------
    pandas.DataFrame
        Indexed by parameter: ``test``, ``groups`` (e.g. ``"A (6), B (6)"``),
        ``statistic``, ``p_exploratory``. ``attrs["note"]`` says why the p-values are
        exploratory.

    Raises
    ------
    KeyError
        No subject has the covariate ``group_by``.
    """
    table = parameter_table(fits, model, derived=derived)
    labels = _group_labels(covariates, group_by, table.index)
    names = _ordered(labels.values(), order)
    rows = []
    for name in table.columns:
        samples = {}
        for g in names:
            x = table.loc[[s for s in table.index if labels.get(s) == g], name].to_numpy(dtype=float)
            x = x[np.isfinite(x)]
            if x.size >= 2:
                samples[g] = x
        test, statistic, p = "", math.nan, math.nan
        if len(samples) == 2:
            a, b = samples.values()
            test = "Mann–Whitney U"
            r = stats.mannwhitneyu(a, b, alternative="two-sided")
            statistic, p = float(r.statistic), float(r.pvalue)
        elif len(samples) > 2:
            test = "Kruskal–Wallis H"
            try:
                r = stats.kruskal(*samples.values())
                statistic, p = float(r.statistic), float(r.pvalue)
            except ValueError:  # every value identical
                pass
        elif len(names) < 2:
            test = "one group only"
        else:
            test = "too few subjects per group"
        rows.append({"parameter": name, "test": test,
                     "groups": ", ".join(f"{g} ({len(x)})" for g, x in samples.items()),
                     "statistic": statistic, "p_exploratory": p})
    frame = pd.DataFrame.from_records(rows, columns=["parameter", "test", "groups", "statistic", "p_exploratory"])
    frame = frame.set_index("parameter")
    frame.attrs.update(model=model, group_by=group_by, note=EXPLORATORY)
    return frame


# --------------------------------------------------------------------------- covariates


def numeric_covariates(covariates: Any, subjects: Iterable[str]) -> list[str]:
    """Covariates whose values are all numbers (at least 3 subjects, not all equal)."""
    cov = _covariates(covariates)
    subjects = list(subjects)
    names = list(dict.fromkeys(k for s in subjects for k in cov.get(s, {})))
    out = []
    for n in names:
        vals = [cov.get(s, {}).get(n) for s in subjects]
        present = [v for v in vals if not _missing(v)]
        if len(present) >= 3 and all(_numeric(v) for v in present) and len({float(v) for v in present}) > 1:
            out.append(n)
    return out


def covariate_correlations(fits: Any, covariates: Any, model: str, *, derived: bool = True) -> pd.DataFrame:
    """Spearman rank correlation of each estimate of ``model`` with each numeric covariate.

    ``scipy.stats.spearmanr`` over the subjects that have both values; exploratory.

    Returns
    -------
    pandas.DataFrame
        Columns ``parameter``, ``covariate``, ``n``, ``rho``, ``p_exploratory``;
        ``attrs["note"]`` says why the p-values are exploratory.

    Examples
    --------
    >>> recs = [FitRecord(str(i), "m", "ok", estimates={"V": 10.0 * w}) for i, w in enumerate([1, 2, 3, 4])]
    >>> cov = {str(i): {"weight": w} for i, w in enumerate([50, 60, 70, 80])}
    >>> float(covariate_correlations(recs, cov, "m").loc[0, "rho"])
    1.0
    """
    table = parameter_table(fits, model, derived=derived)
    cov = _covariates(covariates)
    rows = []
    for c in numeric_covariates(cov, table.index):
        z = np.array([_number(cov.get(s, {}).get(c)) for s in table.index])
        for name in table.columns:
            y = table[name].to_numpy(dtype=float)
            ok = np.isfinite(y) & np.isfinite(z)
            rho, p = math.nan, math.nan
            if ok.sum() >= 3 and np.ptp(y[ok]) > 0 and np.ptp(z[ok]) > 0:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    r = stats.spearmanr(y[ok], z[ok])
                rho, p = float(r.statistic), float(r.pvalue)
            rows.append({"parameter": name, "covariate": c, "n": int(ok.sum()), "rho": rho, "p_exploratory": p})
    frame = pd.DataFrame.from_records(rows, columns=["parameter", "covariate", "n", "rho", "p_exploratory"])
    frame.attrs.update(model=model, note=EXPLORATORY)
    return frame
