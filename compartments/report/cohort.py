"""The cohort part of a report: rich tables of the summaries, a progress bar, plots.

The tables render the frames of :mod:`compartments.summaries`; nothing here computes an
estimate. Plots are drawn on a :class:`~matplotlib.figure.Figure` made without pyplot
(rendered with Agg when saved), like :mod:`compartments.report.plots`.

Examples
--------
>>> from io import StringIO
>>> from rich.console import Console
>>> from compartments.summaries import FitRecord, model_preference
>>> recs = [FitRecord("1", "a", "ok", aic=10.0), FitRecord("1", "b", "failed", "too few observations")]
>>> console = Console(file=StringIO(), width=100)
>>> console.print(preference_table(model_preference(recs)))
>>> "too few observations" in console.file.getvalue(), "Σ AIC" in console.file.getvalue()
(False, True)
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
from rich import box
from rich.console import Console, Group, RenderableType
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn
from rich.table import Table
from rich.text import Text

from ..errors import UsageError
from ..summaries import (
    EXPLORATORY,
    covariate_correlations,
    failures,
    group_summary,
    group_tests,
    model_preference,
    parameter_summary,
    parameter_table,
    study_covariates,
)
from .tables import WidthAware, fmt, fmt_pct

__all__ = [
    "CohortProgress",
    "cohort_panel",
    "correlation_table",
    "covariate_figure",
    "failures_table",
    "group_figure",
    "group_table",
    "plot_parameter_covariate",
    "preference_table",
    "subject_comparison_table",
    "summary_table",
]

CRITERION_LABEL = {"aic": "AIC", "aicc": "AICc", "bic": "BIC"}
STYLE = "whitegrid"


def _table(title: str | None = None) -> Table:
    return Table(title=title, title_justify="left", title_style="bold", box=box.SIMPLE_HEAD, show_edge=False,
                 pad_edge=False, expand=False)


def _with_note(table: RenderableType, note: str) -> Group:
    """A table with a dim note under it (the note wraps to the console, not the table)."""
    return Group(table, Text(note, style="dim"))


def _p(p: Any) -> str:
    """A p-value to two significant figures (``"<0.0001"`` below that)."""
    try:
        v = float(p)
    except (TypeError, ValueError):
        return "—"
    if not math.isfinite(v):
        return "—"
    return "<0.0001" if v < 1e-4 else f"{v:.2g}"


def _label(name: str, unit: str) -> str:
    return f"{name} ({unit})" if unit else name


# --------------------------------------------------------------------------- tables


def preference_table(frame: pd.DataFrame) -> Group:
    """How often each model is preferred (a :func:`~compartments.summaries.model_preference` frame)."""
    crit = CRITERION_LABEL.get(frame.attrs.get("criterion", "aic"), "AIC")
    n_common = int(frame["n_common"].iloc[0]) if len(frame) else 0
    note = (f"Preferred: lowest {crit} for the subject. Σ {crit} over the {n_common} subject(s) where every "
            f"model was fitted; Δ from the lowest sum.")
    t = _table("Models across subjects")
    t.add_column("model")
    t.add_column("fitted", justify="right")
    t.add_column("failed", justify="right")
    t.add_column("preferred", justify="right")
    t.add_column("mean weight", justify="right")
    t.add_column(f"Σ {crit}", justify="right")
    t.add_column(f"Δ Σ {crit}", justify="right")
    for model, r in frame.iterrows():
        share = f"{int(r['preferred'])} ({100 * r['share']:.0f} %)" if math.isfinite(r["share"]) else str(int(r["preferred"]))
        failed = Text(str(int(r["failed"])), style="red") if r["failed"] else Text("0")
        t.add_row(str(model), str(int(r["fitted"])), failed, share, fmt(r["mean_weight"], 2),
                  fmt(r["summed"], 6), fmt(r["delta_summed"], 4))
    return _with_note(t, note)


def subject_comparison_table(frame: pd.DataFrame) -> Group:
    """Per subject: preferred model, margin and weights (a :func:`~compartments.summaries.subject_comparisons` frame)."""
    crit = CRITERION_LABEL.get(frame.attrs.get("criterion", "aic"), "AIC")
    models = list(frame.attrs.get("models", []))
    t = _table("Preferred model per subject")
    t.add_column("subject")
    t.add_column("preferred")
    t.add_column(f"Δ{crit} to next", justify="right")
    for m in models:
        t.add_column(f"w {m}", justify="right")
    for subject, r in frame.iterrows():
        t.add_row(str(subject), r["preferred"] or Text("none fitted", style="red"), fmt(r["margin"], 3),
                  *[fmt(r[m], 2) for m in models])
    return _with_note(t, f"w: Akaike-type weights on {crit}; — where the fit failed.")


def failures_table(frame: pd.DataFrame) -> Table | None:
    """The failed fits with their reasons; None when there are none."""
    if frame.empty:
        return None
    t = _table(f"Fits that failed ({len(frame)})")
    t.add_column("subject")
    t.add_column("model")
    t.add_column("reason", overflow="fold")
    for _, r in frame.iterrows():
        t.add_row(str(r["subject"]), str(r["model"]), str(r["reason"]))
    return t


_SUMMARY_COLUMNS = (("unit", "left"), ("n", "right"), ("geo. mean", "right"), ("geo. CV %", "right"),
                    ("median", "right"), ("min – max", "right"), ("mean", "right"), ("SD", "right"),
                    ("outlying subjects", "left"))


def summary_table(frame: pd.DataFrame, title: str | None = None) -> Group:
    """Parameters across subjects (a :func:`~compartments.summaries.parameter_summary` frame).

    On a console too narrow for all the columns, the table is shown in two parts (geometric
    mean, CV and range; then median, mean, SD and outlying subjects) rather than with
    numbers cut short.
    """
    model = frame.attrs.get("model", "")
    rows = []
    for name, r in frame.iterrows():
        label = Text(str(name), style="italic" if r["kind"] == "derived" else "")
        rows.append([label, r["unit"], str(int(r["n"])), fmt(r["geo_mean"]), fmt_pct(r["geo_cv_percent"]),
                     fmt(r["median"]), f"{fmt(r['min'], 3)} – {fmt(r['max'], 3)}", fmt(r["mean"]), fmt(r["sd"], 3),
                     r["outlying"] or ""])

    def part(heading: str, columns: Sequence[int]) -> Table:
        t = _table(heading)
        t.add_column("", overflow="fold")
        for i in columns:
            name, justify = _SUMMARY_COLUMNS[i - 1]
            t.add_column(name, justify=justify, overflow="fold")  # type: ignore[arg-type]
        for row in rows:
            t.add_row(row[0], *(row[i] for i in columns))
        return t

    heading = title or f"{model}: estimates across subjects"
    wide = part(heading, range(1, 10))
    table = WidthAware(wide, [part(heading, (1, 2, 3, 4, 6)), part(f"{heading} (continued)", (1, 5, 7, 8, 9))])
    return _with_note(table, "Derived quantities in italics. Geometric CV % = 100·√(exp(s²) − 1), s the SD of the logs. "
                             "Outlying: beyond 3 robust SD (1.4826·MAD) from the median on the log scale.")


def group_table(summary: pd.DataFrame, tests: pd.DataFrame) -> Group:
    """Geometric mean (CV %) per group and the test per parameter (frames of
    :func:`~compartments.summaries.group_summary` and :func:`~compartments.summaries.group_tests`)."""
    group_by = tests.attrs.get("group_by", "")
    model = tests.attrs.get("model", "")
    groups = list(dict.fromkeys(summary.index.get_level_values(0))) if len(summary) else []
    n_max = {g: int(summary.loc[g]["n"].max()) for g in groups}
    t = _table(f"{model}: by {group_by} — geometric mean (CV %)")
    t.add_column("")
    t.add_column("unit")
    for g in groups:
        t.add_column(f"{g}\nn = {n_max[g]}", justify="right")
    tested = not set(tests["test"]) <= {"one group only"}
    if tested:
        t.add_column("test")
        t.add_column("p", justify="right")
    short = {"Mann–Whitney U": "M–W U", "Kruskal–Wallis H": "K–W H"}
    for name, r in tests.iterrows():
        cells = []
        unit = ""
        for g in groups:
            if (g, name) in summary.index:
                s = summary.loc[(g, name)]
                unit = s["unit"]
                extra = f" n={int(s['n'])}" if int(s["n"]) != n_max[g] else ""
                cells.append(f"{fmt(s['geo_mean'])} ({fmt_pct(s['geo_cv_percent'])}){extra}")
            else:
                cells.append("—")
        tail = [short.get(r["test"], r["test"]), _p(r["p_exploratory"])] if tested else []
        t.add_row(str(name), unit, *cells, *tail)
    # one row per parameter and group, for consoles too narrow for a column per group
    narrow = _table(f"{model}: by {group_by} — geometric mean (CV %)")
    narrow.add_column("", overflow="fold")
    narrow.add_column("unit")
    narrow.add_column(str(group_by) or "group", overflow="fold")
    narrow.add_column("n", justify="right")
    narrow.add_column("geo. mean (CV %)", justify="right")
    if tested:
        narrow.add_column("test")
        narrow.add_column("p", justify="right")
    for name, r in tests.iterrows():
        present = [g for g in groups if (g, name) in summary.index]
        for k, g in enumerate(present):
            s = summary.loc[(g, name)]
            tail = ([short.get(r["test"], r["test"]), _p(r["p_exploratory"])] if k == 0 else ["", ""]) if tested else []
            narrow.add_row(str(name) if k == 0 else "", s["unit"] if k == 0 else "", str(g), str(int(s["n"])),
                           f"{fmt(s['geo_mean'])} ({fmt_pct(s['geo_cv_percent'])})", *tail,
                           end_section=k == len(present) - 1)
    table = WidthAware(t, [narrow])
    used = [f"{v}: {k}" for k, v in short.items() if k in set(tests["test"])]
    if groups and 2 * len(groups) > sum(n_max.values()):
        table = _with_note(table, f"{group_by} takes {len(groups)} different values among {sum(n_max.values())} "
                                  "subjects: groups this small cannot be compared. Group by a column of categories "
                                  "(arm, sex, site); numeric covariates are shown as rank correlations.")
    if not tested:
        return Group(table)
    legend = (", ".join(used) + (" (scipy.stats). " if used else "")) + f"p-values are {EXPLORATORY}."
    return _with_note(table, legend)


def correlation_table(frame: pd.DataFrame) -> Group | None:
    """Spearman correlations (a :func:`~compartments.summaries.covariate_correlations` frame); None if empty."""
    if frame.empty:
        return None
    model = frame.attrs.get("model", "")
    covs = list(dict.fromkeys(frame["covariate"]))
    t = _table(f"{model}: Spearman rank correlation with covariates, ρ (p, n)")
    t.add_column("")
    for c in covs:
        t.add_column(c, justify="right")
    for name in dict.fromkeys(frame["parameter"]):
        cells = []
        for c in covs:
            r = frame[(frame["parameter"] == name) & (frame["covariate"] == c)].iloc[0]
            cells.append(f"{fmt(r['rho'], 2)} ({_p(r['p_exploratory'])}, {int(r['n'])})")
        t.add_row(str(name), *cells)
    # one row per parameter and covariate, for consoles too narrow for a column per covariate
    narrow = _table(f"{model}: Spearman rank correlation with covariates")
    narrow.add_column("", overflow="fold")
    narrow.add_column("covariate", overflow="fold")
    narrow.add_column("ρ", justify="right")
    narrow.add_column("p", justify="right")
    narrow.add_column("n", justify="right")
    names = list(dict.fromkeys(frame["parameter"]))
    for name in names:
        for k, c in enumerate(covs):
            r = frame[(frame["parameter"] == name) & (frame["covariate"] == c)].iloc[0]
            narrow.add_row(str(name) if k == 0 else "", c, fmt(r["rho"], 2), _p(r["p_exploratory"]), str(int(r["n"])),
                           end_section=k == len(covs) - 1)
    return _with_note(WidthAware(t, [narrow]), f"p-values (Spearman, scipy.stats) are {EXPLORATORY}.")


def cohort_panel(cohort: Any, study: Any = None, group_by: str | None = None, *,
                 criterion: str | None = None) -> Group:
    """The cohort part of the report: model preference, failures, estimates across
    subjects per model, and — with covariates — group tests and correlations.

    Parameters
    ----------
    cohort : CohortResult or sequence of fits
    study : Study, optional
        Gives the covariates (none without it).
    group_by : str, optional
        A covariate to split the subjects by.
    criterion : {"aic", "aicc", "bic"}, optional
        Default the cohort's own (``settings["criterion"]``), else AIC.

    Raises
    ------
    UsageError
        ``group_by`` is not a covariate of the study.
    """
    fits = list(cohort.fits) if hasattr(cohort, "fits") else list(cohort)
    settings = getattr(cohort, "settings", {}) or {}
    criterion = criterion or settings.get("criterion", "aic")
    models = list(getattr(cohort, "models", ())) or list(dict.fromkeys(f.template for f in fits))
    covariates = study_covariates(study) if study is not None else {}
    if group_by is not None and not any(group_by in c for c in covariates.values()):
        names = sorted({k for c in covariates.values() for k in c})
        raise UsageError(f"--group-by {group_by!r}: no such covariate; the study has {', '.join(names) or 'none'}")
    parts: list[RenderableType] = []
    if len(models) > 1:
        parts.append(preference_table(model_preference(fits, criterion)))
    fail = failures_table(failures(fits))
    if fail is not None:
        parts.append(fail)
    for m in models:
        if sum(f.ok for f in fits if f.template == m) < 2:
            continue
        parts.append(summary_table(parameter_summary(fits, m)))
        if group_by is not None:
            parts.append(group_table(group_summary(fits, covariates, group_by, m),
                                     group_tests(fits, covariates, group_by, m)))
        corr = correlation_table(covariate_correlations(fits, covariates, m)) if covariates else None
        if corr is not None:
            parts.append(corr)
    if not parts:
        parts.append(Text("Too few successful fits for a summary across subjects."))
    return Group(*parts)


# --------------------------------------------------------------------------- progress


class CohortProgress:
    """A rich progress bar for :func:`~compartments.cohort.run_cohort`: done/total,
    failures so far, time left. Use it as a context manager and pass it as ``progress``.

    Parameters
    ----------
    console : rich.console.Console, optional
        Default a console on stderr.
    description : str
    transient : bool
        Remove the bar when done.

    Examples
    --------
    >>> from io import StringIO
    >>> with CohortProgress(Console(file=StringIO(), width=80)) as bar:
    ...     bar(0, 4, 0); bar(3, 4, 1)
    >>> bar.done, bar.failed
    (3, 1)
    """

    def __init__(self, console: Console | None = None, description: str = "fitting", transient: bool = False):
        self.console = console if console is not None else Console(stderr=True)
        self._bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                             TextColumn("{task.fields[failed]} failed"), TextColumn("·"), TimeRemainingColumn(),
                             TextColumn("left"), console=self.console, transient=transient)
        self._task: Any = None
        self._description = description
        self.done = 0
        self.failed = 0
        self.started = time.monotonic()

    def __enter__(self) -> CohortProgress:
        self._bar.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._bar.stop()

    def __call__(self, done: int, total: int, failed: int) -> None:
        self.done, self.failed = done, failed
        if self._task is None:
            # fits taken from a resumed run count as done from the start, not as speed
            self._task = self._bar.add_task(self._description, total=total, completed=done, failed=failed)
        else:
            self._bar.update(self._task, completed=done, total=total, failed=failed)


# --------------------------------------------------------------------------- plots


def _covariate_frame(fits: Any, covariates: Mapping[str, Mapping[str, object]], model: str) -> pd.DataFrame:
    table = parameter_table(fits, model)
    cov = pd.DataFrame.from_dict({str(k): dict(v) for k, v in covariates.items()}, orient="index")
    out = table.join(cov, how="left")
    out.attrs = dict(table.attrs)
    return out


def plot_parameter_covariate(fits: Any, covariates: Mapping[str, Mapping[str, object]], model: str,
                             parameter: str, covariate: str, ax: Any = None, *, unit: str = "") -> Any:
    """One estimate of ``model`` against a numeric covariate, a point per subject, with
    Spearman's ρ in the title; log scale when the estimates are positive.

    Returns
    -------
    matplotlib.axes.Axes
    """
    import seaborn as sns
    from matplotlib.figure import Figure
    from scipy import stats

    data = _covariate_frame(fits, covariates, model)
    if ax is None:
        with sns.axes_style(STYLE):
            ax = Figure(figsize=(4.0, 3.4), layout="constrained").subplots()
    x = pd.to_numeric(data[covariate], errors="coerce") if covariate in data else pd.Series(dtype=float)
    y = data[parameter].astype(float)
    keep = x.notna() & y.notna() & np.isfinite(y)
    sns.scatterplot(x=x[keep], y=y[keep], ax=ax, color="C0", s=36)
    if keep.sum() and (y[keep] > 0).all():
        ax.set_yscale("log")
    rho = math.nan
    if keep.sum() >= 3 and np.ptp(x[keep]) > 0 and np.ptp(y[keep]) > 0:
        r = stats.spearmanr(x[keep], y[keep])
        rho, p = float(r.statistic), float(r.pvalue)
        ax.set_title(f"ρ = {rho:+.2f} (p = {_p(p)}, exploratory), n = {int(keep.sum())}", fontsize=9)
    unit = unit or data.attrs.get("units", {}).get(parameter, "")
    ax.set_xlabel(covariate)
    ax.set_ylabel(_label(parameter, unit))
    return ax


def covariate_figure(fits: Any, covariates: Mapping[str, Mapping[str, object]], model: str,
                     parameters: Sequence[str] | None = None, covariate_names: Sequence[str] | None = None) -> Any:
    """Each estimate of ``model`` (rows) against each numeric covariate (columns).

    Returns
    -------
    matplotlib.figure.Figure
    """
    import seaborn as sns
    from matplotlib.figure import Figure

    from ..summaries import numeric_covariates

    table = parameter_table(fits, model)
    params = list(parameters) if parameters is not None else [c for c in table.columns
                                                              if table.attrs["kinds"][c] == "parameter"]
    covs = list(covariate_names) if covariate_names is not None else numeric_covariates(covariates, table.index)
    if not params or not covs:
        raise UsageError(f"{model}: nothing to plot (no estimates, or no numeric covariate with 3 or more subjects)")
    with sns.axes_style(STYLE):
        fig = Figure(figsize=(3.4 * len(covs) + 0.4, 2.9 * len(params) + 0.4), layout="constrained")
        axes = np.atleast_2d(fig.subplots(len(params), len(covs), squeeze=False))
    for i, p in enumerate(params):
        for j, c in enumerate(covs):
            plot_parameter_covariate(fits, covariates, model, p, c, ax=axes[i, j])
    fig.suptitle(f"{model}: estimates against covariates")
    return fig


def group_figure(fits: Any, covariates: Mapping[str, Mapping[str, object]], group_by: str, model: str,
                 parameters: Sequence[str] | None = None) -> Any:
    """Each estimate of ``model`` by group of ``group_by``: a box and every subject's point.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import seaborn as sns
    from matplotlib.figure import Figure

    data = _covariate_frame(fits, covariates, model)
    if group_by not in data:
        raise UsageError(f"no covariate {group_by!r} to group by")
    params = list(parameters) if parameters is not None else [c for c in data.attrs["kinds"]
                                                              if data.attrs["kinds"][c] == "parameter"]
    data = data[data[group_by].notna()].copy()
    data[group_by] = data[group_by].astype(str)
    order = sorted(data[group_by].unique())
    with sns.axes_style(STYLE):
        fig = Figure(figsize=(max(2.8 * len(params), 4.0), 3.6), layout="constrained")
        axes = np.atleast_1d(fig.subplots(1, max(len(params), 1)))
    for ax, p in zip(axes, params, strict=False):
        positive = bool((data[p] > 0).all())
        sns.boxplot(data=data, x=group_by, y=p, order=order, ax=ax, color="0.9", width=0.5, fliersize=0,
                    log_scale=positive)
        sns.swarmplot(data=data, x=group_by, y=p, order=order, ax=ax, color="C0", size=5)
        ax.set_ylabel(_label(p, data.attrs["units"].get(p, "")))
    fig.suptitle(f"{model}: estimates by {group_by}")
    return fig
