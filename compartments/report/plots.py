"""Plots of a fit run (seaborn on matplotlib, drawn without pyplot, saved as PNG).

Every function draws on an :class:`~matplotlib.axes.Axes` or returns a
:class:`~matplotlib.figure.Figure` it made itself, so no global backend or pyplot state is
touched; :func:`write_plots` saves them atomically. Nothing here estimates anything: the
curves and bands come from :func:`compartments.exposure.fitted_curve`.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import seaborn as sns
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from ..atomic import atomic_path
from ..exposure import fitted_curve
from .export import prediction_grid, safe_name

STYLE = "whitegrid"
DPI = 110
OBS_MARKERS = ("o", "s", "D", "^", "v", "P", "X")
CENSORED_MARKER = "v"

__all__ = [
    "observed_predicted_figure",
    "parameter_figure",
    "plot_observed",
    "plot_fit_curves",
    "profile_figure",
    "residual_figure",
    "save_figure",
    "subject_figure",
    "write_plots",
]


def _plain_ticks(ax: Axes, axis: str = "y") -> None:
    """Tick labels as plain numbers (``0.05``, ``2``) instead of powers of ten on log axes."""
    from matplotlib.ticker import FuncFormatter

    f = FuncFormatter(lambda v, _pos: f"{v:.3g}")
    target = ax.yaxis if axis == "y" else ax.xaxis
    target.set_major_formatter(f)
    target.set_minor_formatter(FuncFormatter(lambda v, _pos: ""))


def _palette(n: int) -> list[Any]:
    return list(sns.color_palette("colorblind", max(n, 1)))


def _label(name: str, unit: str) -> str:
    return f"{name} ({unit})" if unit else name


def _y_label(fits: Sequence[Any]) -> str:
    obs: dict[str, str] = {}
    for f in fits:
        if f.model_template is not None:
            for o in f.model_template.observables:
                obs.setdefault(o.name, o.unit)
    if len(obs) == 1:
        name, unit = next(iter(obs.items()))
        return _label(name, unit)
    units = set(obs.values())
    return _label("value", units.pop() if len(units) == 1 else "")


def _time_unit(fits: Sequence[Any], default: str = "h") -> str:
    for f in fits:
        if f.model_template is not None:
            return f.model_template.time_unit
    return default


def unfitted_rows(fits: Sequence[Any], subject: Any) -> np.ndarray:
    """Mask of the subject's samples that no successful fit among ``fits`` used (e.g. a pre-dose
    sample left out under proportional error); all False when there is no successful fit."""
    ok = [f for f in fits if f.ok and f.residuals is not None]
    times = np.asarray(subject.times, dtype=float)
    if not ok:
        return np.zeros(times.size, bool)
    used: dict[tuple[float, float], int] = {}
    for f in ok:
        r = f.residuals
        counts: dict[tuple[float, float], int] = {}
        for s, t, y in zip(r.subject, r.time, r.observed, strict=True):
            if s == str(subject.id):
                counts[(float(t), float(y))] = counts.get((float(t), float(y)), 0) + 1
        for k, v in counts.items():
            used[k] = max(used.get(k, 0), v)
    out = np.zeros(times.size, bool)
    for i, (t, y) in enumerate(zip(times, np.asarray(subject.values, dtype=float), strict=True)):
        k = (float(t), float(y))
        if used.get(k, 0) > 0:
            used[k] -= 1
        else:
            out[i] = True
    return out


def plot_observed(ax: Axes, subject: Any, colors: Mapping[str | None, Any] | None = None,
                  unfitted: np.ndarray | None = None) -> None:
    """Observed samples: filled points; values below the LLOQ as open down-triangles at the LLOQ;
    samples no fit used (``unfitted``) as open grey circles."""
    obs_names = list(dict.fromkeys(subject.observables))
    several = len(obs_names) > 1
    left = np.zeros(len(subject.times), bool) if unfitted is None else np.asarray(unfitted, dtype=bool)
    if left.any():
        ax.scatter(subject.times[left], subject.values[left], marker="o", s=40, facecolors="none",
                   edgecolors="0.45", zorder=3, label="not fitted (see the notes)")
    for i, o in enumerate(obs_names):
        mask = np.array([x == o for x in subject.observables], dtype=bool) & ~left
        cens = np.asarray(subject.censored, dtype=bool)
        color = (colors or {}).get(o, "0.15")
        label = f"observed {o}" if several and o else "observed"
        q = mask & ~cens
        if q.any():
            sns.scatterplot(x=subject.times[q], y=subject.values[q], ax=ax, color=color, s=36, zorder=3,
                            marker=OBS_MARKERS[i % len(OBS_MARKERS)], label=label, edgecolor="white", linewidth=0.5)
        c = mask & cens
        if c.any():
            ax.scatter(subject.times[c], subject.values[c], marker=CENSORED_MARKER, s=42, facecolors="none",
                       edgecolors=color, zorder=3, label=f"below LLOQ{' (' + o + ')' if several and o else ''}, at LLOQ")


def subject_curves(fits: Sequence[Any], subject: str, grid: np.ndarray | None = None) -> list[tuple[Any, str, Any]]:
    """``(fit, observable, Curve)`` for every successful fit and observable, for ``subject``."""
    out = []
    for f in fits:
        if not f.ok or f.model_template is None:
            continue
        g = grid if grid is not None else prediction_grid(f, subject)
        for o in f.model_template.observable_names:
            out.append((f, o, fitted_curve(f, g, subject=subject, observable=o)))
    return out


def plot_fit_curves(ax: Axes, fits: Sequence[Any], subject: str, grid: np.ndarray | None = None,
                    colors: Mapping[str, Any] | None = None, by_observable: bool = False,
                    curves: Sequence[tuple[Any, str, Any]] | None = None) -> list[tuple[Any, str, Any]]:
    """Fitted curves of ``fits`` for ``subject`` with their 95 % bands; returns the curves drawn.

    ``curves`` (from :func:`subject_curves`) saves computing them again for a second axes.
    """
    curves = list(curves) if curves is not None else subject_curves(fits, subject, grid)
    styles = ("-", "--", ":", "-.")
    for f, o, c in curves:
        names = f.model_template.observable_names
        key = o if by_observable else f.template
        color = (colors or {}).get(key, "C0")
        label = f"{f.template}" + (f" · {o}" if len(names) > 1 else "")
        ls = styles[0 if by_observable else names.index(o) % len(styles)]
        ax.plot(c.times, c.predicted, color=color, lw=1.8, ls=ls, label=label, zorder=2)
        ax.fill_between(c.times, c.lower, c.upper, color=color, alpha=0.18, lw=0, zorder=1)
    return curves


def subject_figure(fits: Sequence[Any], subject: Any, title: str | None = None) -> Figure:
    """One subject's data and fitted curves with 95 % bands, linear (left) and log (right) scale.

    Parameters
    ----------
    fits : sequence of FitResult
        The fits to draw for this subject (any number of models; failed ones are skipped).
    subject : Subject
        The study subject (its samples are drawn, censored ones and ones no fit used marked).
    title : str, optional
    """
    ok = [f for f in fits if f.ok]
    obs_all = list(dict.fromkeys(o for f in ok if f.model_template is not None
                                 for o in f.model_template.observable_names))
    by_obs = len(ok) <= 1 and len(obs_all) > 1
    keys = obs_all if by_obs else [f.template for f in ok]
    pal = _palette(len(keys))
    colors = dict(zip(keys, pal, strict=False))
    point_colors: dict[str | None, Any] = {}
    if by_obs:
        point_colors = {o: colors[o] for o in obs_all}
        if len(obs_all) == 1:
            point_colors[None] = colors[obs_all[0]]
    with sns.axes_style(STYLE):
        fig = Figure(figsize=(10.5, 4.0), layout="constrained")
        axes = fig.subplots(1, 2)
    times = np.asarray(subject.times, dtype=float)
    doses = [float(d.time) for d in subject.doses]
    end = max(list(times) + doses + [0.0]) * 1.04 or 1.0
    grid = np.union1d(np.linspace(0.0, end, 121), np.array(doses, dtype=float))
    curves = subject_curves(ok, subject.id, grid)
    unfitted = unfitted_rows(ok, subject)
    for ax, log in zip(axes, (False, True), strict=True):
        plot_fit_curves(ax, ok, subject.id, colors=colors, by_observable=by_obs, curves=curves)
        plot_observed(ax, subject, point_colors, unfitted)
        ax.set_xlabel(_label("time", _time_unit(ok)))
        ax.set_ylabel(_y_label(ok) if ok else "value")
        if log:
            ax.set_yscale("log")
            pos = np.asarray(subject.values)[np.asarray(subject.values) > 0]
            if pos.size:
                ax.set_ylim(bottom=pos.min() / 3)
            _plain_ticks(ax, "y")
            ax.set_title("log scale")
        else:
            ax.set_ylim(bottom=0)
            ax.set_title("linear scale")
        for d in doses:
            ax.axvline(d, color="0.6", lw=0.8, ls=":", zorder=0)
    handles, labels = axes[0].get_legend_handles_labels()
    for ax in axes:
        if ax.get_legend() is not None:
            ax.get_legend().remove()
    if handles:
        axes[0].legend(handles, labels, fontsize=8, frameon=True)
    fig.suptitle(title or f"Subject {subject.id}: data, fitted curves and 95 % bands")
    return fig


def residual_figure(fits: Sequence[Any], title: str | None = None) -> Figure:
    """Weighted residuals against time (left) and against the prediction (right).

    Censored observations are drawn as open triangles.
    """
    frames = []
    for f in fits:
        r = f.residuals
        if not f.ok or r is None:
            continue
        frames.append(pd.DataFrame({"subject": list(r.subject), "model": f.template, "time": r.time,
                                    "predicted": r.predicted, "weighted residual": r.weighted,
                                    "censored": np.asarray(r.censored, dtype=bool)}))
    data = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(
        columns=["subject", "model", "time", "predicted", "weighted residual", "censored"])
    with sns.axes_style(STYLE):
        fig = Figure(figsize=(10.5, 4.0), layout="constrained")
        axes = fig.subplots(1, 2)
    hue = "subject" if 1 < data["subject"].nunique() <= 20 else None
    unit = _time_unit(fits)
    for ax, x, xlabel in ((axes[0], "time", _label("time", unit)), (axes[1], "predicted", "prediction (" + _y_label(fits) + ")")):
        q = data[~data["censored"].astype(bool)]
        sns.scatterplot(data=q, x=x, y="weighted residual", hue=hue, ax=ax, s=30, legend=(ax is axes[1]) and hue is not None,
                        palette="colorblind" if hue else None, color=None if hue else "C0")
        c = data[data["censored"].astype(bool)]
        if len(c):
            ax.scatter(c[x], c["weighted residual"], marker=CENSORED_MARKER, facecolors="none", edgecolors="0.3",
                       label="below LLOQ")
        ax.axhline(0.0, color="0.3", lw=1)
        for yv in (-2.0, 2.0):
            ax.axhline(yv, color="0.6", lw=0.8, ls="--")
        ax.set_xlabel(xlabel)
        ax.set_ylabel("weighted residual (SD units)")
    if axes[1].get_legend() is not None:
        sns.move_legend(axes[1], "upper left", bbox_to_anchor=(1.0, 1.0), fontsize=7, title="subject")
    models = sorted({f.template for f in fits if f.ok})
    fig.suptitle(title or f"Residuals: {', '.join(models)}")
    return fig


def observed_predicted_figure(fits: Sequence[Any]) -> Figure:
    """Observed against predicted for every quantified observation of the cohort, one colour per model."""
    frames = []
    for f in fits:
        r = f.residuals
        if not f.ok or r is None:
            continue
        q = ~np.asarray(r.censored, dtype=bool)
        frames.append(pd.DataFrame({"model": f.template, "observed": np.asarray(r.observed)[q],
                                    "predicted": np.asarray(r.predicted)[q]}))
    data = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=["model", "observed", "predicted"])
    with sns.axes_style(STYLE):
        fig = Figure(figsize=(5.5, 5.0), layout="constrained")
        ax = fig.subplots()
    sns.scatterplot(data=data, x="predicted", y="observed", hue="model", style="model", ax=ax, s=30,
                    palette="colorblind", alpha=0.8)
    if len(data):
        lo = float(min(data["observed"].min(), data["predicted"].min()))
        hi = float(max(data["observed"].max(), data["predicted"].max()))
        ax.plot([lo, hi], [lo, hi], color="0.3", lw=1, ls="--", label="identity")
    label = _y_label(fits)
    ax.set_xlabel(f"predicted {label}")
    ax.set_ylabel(f"observed {label}")
    ax.set_title("Observed against predicted")
    return fig


def parameter_figure(fits: Sequence[Any], model: str) -> Figure:
    """Each estimated parameter of ``model`` across subjects: a box with every subject's point (log scale)."""
    ok = [f for f in fits if f.ok and f.template == model]
    names = list(dict.fromkeys(n for f in ok for n in f.parameter_names))
    rows = [{"parameter": n, "subject": f.subject, "estimate": f.estimates[n]} for f in ok for n in f.parameter_names]
    data = pd.DataFrame(rows, columns=["parameter", "subject", "estimate"])
    units = {n: next((f.units.get(n, "") for f in ok if n in f.units), "") for n in names}
    with sns.axes_style(STYLE):
        fig = Figure(figsize=(max(2.4 * len(names), 4.0), 3.8), layout="constrained")
        axes = np.atleast_1d(fig.subplots(1, max(len(names), 1)))
    for ax, n in zip(axes, names, strict=False):
        d = data[data["parameter"] == n]
        with warnings.catch_warnings():  # seaborn 0.13 passes matplotlib's deprecated `vert`
            warnings.simplefilter("ignore", DeprecationWarning)
            sns.boxplot(y=d["estimate"], ax=ax, color="0.9", width=0.45, fliersize=0,
                        log_scale=bool((d["estimate"] > 0).all()))
        sns.stripplot(y=d["estimate"], ax=ax, color="C0", size=5, jitter=False)
        ax.set_ylabel(_label(n, units[n]))
        ax.set_xlabel("")
        if ax.get_yscale() == "log":
            _plain_ticks(ax, "y")
            ax.minorticks_off()
            ax.set_yticks(np.unique(np.quantile(d["estimate"], [0.0, 0.5, 1.0])))
        ax.set_title(n)
    fig.suptitle(f"{model}: estimates across {len(ok)} subjects")
    return fig


def profile_figure(result: Any) -> Figure:
    """Profile likelihood of each parameter: rise of −2 log-likelihood above its minimum."""
    profiles = dict(result.profiles or {})
    names = list(profiles)
    with sns.axes_style(STYLE):
        fig = Figure(figsize=(max(3.2 * len(names), 4.0), 3.6), layout="constrained")
        axes = np.atleast_1d(fig.subplots(1, max(len(names), 1)))
    for ax, n in zip(axes, names, strict=False):
        p = profiles[n]
        v = np.asarray(p.values, dtype=float)
        rise = np.asarray(p.objective, dtype=float) - float(result.objective)
        ax.plot(v, rise, marker="o", ms=3, color="C0")
        ax.axhline(p.threshold, color="C3", ls="--", lw=1, label="95 % threshold")
        ax.axvline(result.estimates[n], color="0.4", lw=0.8, ls=":")
        for limit in p.ci:
            if np.isfinite(limit):
                ax.axvline(limit, color="C3", lw=0.8, ls=":")
        ax.set_xlabel(_label(n, result.units.get(n, "")))
        ax.set_ylabel("Δ(−2 log-likelihood)")
    fig.suptitle(f"Profile likelihood: {result.template}, subject {result.subject}")
    return fig


def save_figure(fig: Figure, path: str | Path) -> Path:
    """Save ``fig`` as PNG atomically."""
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=DPI)
    return Path(path)


def write_plots(cohort: Any, study: Any, out_dir: str | Path, group_by: str | None = None) -> dict[str, list[Path]]:
    """Draw and save every plot of the run into ``out_dir`` (which must exist).

    Returns
    -------
    dict
        Kind -> paths written: ``"subject"`` (one per study subject fitted),
        ``"residuals"`` (one per model), ``"observed_predicted"``, ``"parameters"`` (one per
        model with two or more successful subjects), ``"covariates"`` and ``"groups"`` (per
        model, with numeric covariates or ``group_by``) and ``"profiles"`` (one per fit
        with profiles).
    """
    out = Path(out_dir)
    written: dict[str, list[Path]] = {"subject": [], "residuals": [], "observed_predicted": [], "parameters": [],
                                      "covariates": [], "groups": [], "profiles": []}
    fits = list(cohort.fits)
    pooled = bool(cohort.settings.get("pooled"))
    for s in study.subjects:
        mine = [f for f in fits if (s.id in (f.doses or {}) if pooled else f.subject == s.id)]
        if not mine:
            continue
        fig = subject_figure(mine, s)
        written["subject"].append(save_figure(fig, out / f"subject_{safe_name(s.id)}.png"))
    for model in cohort.models:
        of_model = [f for f in fits if f.template == model and f.ok]
        if not of_model:
            continue
        written["residuals"].append(save_figure(residual_figure(of_model), out / f"residuals_{safe_name(model)}.png"))
        if len(of_model) >= 2:
            written["parameters"].append(save_figure(parameter_figure(of_model, model),
                                                     out / f"parameters_{safe_name(model)}.png"))
    written["covariates"], written["groups"] = _cohort_plots(cohort, study, out, group_by)
    if any(f.ok for f in fits):
        written["observed_predicted"].append(save_figure(observed_predicted_figure(fits), out / "observed_predicted.png"))
    for f in fits:
        if f.ok and f.profiles:
            written["profiles"].append(save_figure(profile_figure(f),
                                                   out / f"profile_{safe_name(f.template)}_{safe_name(f.subject)}.png"))
    return written


def _cohort_plots(cohort: Any, study: Any, out: Path, group_by: str | None) -> tuple[list[Path], list[Path]]:
    """Estimates against numeric covariates and by group (from the cohort layer's figures)."""
    from ..errors import UsageError
    from ..summaries import study_covariates
    from .cohort import covariate_figure, group_figure

    covs, groups = [], []
    covariates = study_covariates(study)
    if cohort.settings.get("pooled") or not any(covariates.values()):
        return covs, groups
    for model in cohort.models:
        ok = [f for f in cohort.fits if f.template == model and f.ok]
        if len(ok) < 3:
            continue
        try:
            covs.append(save_figure(covariate_figure(ok, covariates, model), out / f"covariates_{safe_name(model)}.png"))
        except UsageError:
            pass  # no numeric covariate with enough subjects
        if group_by is not None:
            groups.append(save_figure(group_figure(ok, covariates, group_by, model), out / f"groups_{safe_name(model)}.png"))
    return covs, groups
