"""The report as Markdown, with the plots linked, to share or paste into a notebook.

It holds the same content as the terminal report (:mod:`compartments.report.tables`):
what was read and the settings, each fit, the model comparison, the cohort view, and the
cautions.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from .export import CrossChecks, error_parameter_unit, residual_sd, residual_unit, safe_name
from .tables import (
    CAUTIONS,
    EXPOSURE_LABELS,
    comparison_sentence,
    fmt,
    fmt_pct,
    parameter_columns,
)


def _cell(x: Any) -> str:
    return str(x).replace("|", "\\|").replace("\n", " ")


def md_table(columns: Sequence[str], rows: Sequence[Sequence[Any]], right: Sequence[bool] | None = None) -> str:
    """A GitHub-flavoured Markdown table.

    Examples
    --------
    >>> print(md_table(["a", "b"], [[1, "x|y"]]))
    | a | b |
    |---|---|
    | 1 | x\\|y |
    """
    right = right or [False] * len(columns)
    head = "| " + " | ".join(_cell(c) for c in columns) + " |"
    rule = "|" + "|".join("--:" if r else "---" for r in right) + "|"
    body = ["| " + " | ".join(_cell(x) for x in row) + " |" for row in rows]
    return "\n".join([head, rule, *body])


def _link(path: Path, base: Path) -> str:
    rel = os.path.relpath(Path(path).resolve(), base.resolve())
    return Path(rel).as_posix()


def _fit_section(f: Any, checks: CrossChecks, level: str = "###") -> list[str]:
    out = [f"{level} {f.template} · subject {f.subject} — {'ok' if f.ok else 'failed'}", ""]
    if not f.ok:
        out += [f"**Failed:** {f.message or 'no reason was recorded'}", ""]
        return out
    out += [f"_{f.strategy} strategy, {f.error_model} error, seed {f.seed}; covariance: {f.covariance_method or '—'}_", ""]
    header, rows, note = parameter_columns(f)
    out.append(md_table(header, rows, [i not in (0, 2) for i in range(len(header))]))
    out.append("")
    if note:
        out += [f"_{note[0].upper() + note[1:]}._", ""]
    t = f.model_template
    if f.fixed:
        out.append("**Held fixed:** " + ", ".join(
            f"{n} = {fmt(v)} {t.parameter(n).unit if t is not None else ''}".rstrip() for n, v in f.fixed.items()))
        out.append("")
    if f.error_parameters:
        items = []
        for n, v in f.error_parameters.items():
            unit = error_parameter_unit(n, f)
            items.append(f"{n} = {fmt(v, 3)} ({fmt_pct(100 * v)} %)" if unit == "fraction"
                         else f"{n} = {fmt(v, 3)} {unit}".rstrip())
        out.append(f"**Error model ({f.error_model}):** " + ", ".join(items))
        out.append("")
    if f.derived:
        out.append(md_table(["derived quantity", "value", "unit", "SE", "meaning"],
                            [[n, fmt(d.value), d.unit, fmt(d.se, 3), d.description] for n, d in f.derived.items()],
                            [False, True, False, True, False]))
        out.append("")
    e = checks.exposures.get((f.subject, f.template))
    if e is not None:
        nca = checks.nca.get(f.subject)
        d = e.as_dict()
        cols = ["exposure (fitted curve)", "model"] + (["NCA"] if nca is not None else []) + ["unit"]
        rows = []
        for key, label in EXPOSURE_LABELS.items():
            row = [label, fmt(d[key]["value"])]
            if nca is not None:
                row.append(fmt(getattr(nca, key)))
            row.append(d[key]["unit"])
            rows.append(row)
        out.append(md_table(cols, rows, [False, True] + ([True] if nca is not None else []) + [False]))
        out.append("")
        notes = list(e.notes) + ([f"NCA: {n}" for n in nca.notes] if nca is not None else [])
        if notes:
            out += [f"- _{n}_" for n in notes] + [""]
    r = f.residuals
    n_cens = int(r.censored.sum()) if r is not None else 0
    out.append(f"**Fit quality:** {f.n_obs} observations{f' ({n_cens} below LLOQ)' if n_cens else ''}; "
               f"−2 log-likelihood {fmt(f.objective, 5)}; AIC {fmt(f.aic, 5)}; AICc {fmt(f.aicc, 5)}; "
               f"BIC {fmt(f.bic, 5)}; residual SD {fmt(residual_sd(f), 3)} {residual_unit(f)}".rstrip())
    out.append("")
    if f.warnings:
        out.append("**Notes on this fit**")
        out.append("")
        out += [f"- {w}" for w in f.warnings]
        out.append("")
    return out


def _cohort_tables(cohort: Any) -> list[str]:
    try:
        from ..summaries import parameter_summary  # written with the cohort layer
    except ImportError:
        return []
    out: list[str] = []
    for model in cohort.models:
        ok = [f for f in cohort.fits if f.template == model and f.ok]
        if len(ok) < 2:
            continue
        frame = parameter_summary(cohort.fits, model)
        if frame is None or len(frame) == 0:
            continue
        out += [f"### {model}: parameters across subjects", ""]
        frame = frame.reset_index()
        labels = {"geo_mean": "geometric mean", "geo_cv_percent": "geometric CV %", "sd": "SD", "outlying": "outlying subjects"}
        cols = [labels.get(str(c), str(c)) for c in frame.columns]
        rows = [[fmt(v) if isinstance(v, float) else v for v in rec] for rec in frame.itertuples(index=False)]
        out += [md_table(cols, rows), ""]
    return out


def markdown_report(cohort: Any, study: Any, settings: Mapping[str, Any], checks: CrossChecks | None = None, *,
                    plots: Mapping[str, Sequence[Path]] | None = None, base: str | Path = ".") -> str:
    """The report as Markdown text.

    Parameters
    ----------
    cohort : CohortResult
    study : Study
    settings : mapping
    checks : CrossChecks, optional
    plots : mapping, optional
        From :func:`compartments.report.plots.write_plots`; linked relative to ``base``.
    base : path
        Folder of the Markdown file (links are relative to it).
    """
    checks = checks or CrossChecks()
    plots = plots or {}
    base = Path(base)
    title = settings.get("title") or f"Compartmental fit of {Path(str(study.source or 'data')).name}"
    t = study.summary_totals()
    lo, med, hi = t["obs_per_subject"]
    first, last = t["time_span"]
    out = [f"# {title}", ""]
    out += ["## Data and settings", ""]
    out += [f"- **file:** `{study.source}`" + (f" (sha256 `{study.sha256}`)" if study.sha256 else ""),
            f"- **subjects:** {t['subjects']}" + (f", {t['skipped']} skipped" if t["skipped"] else ""),
            f"- **observations:** {t['observations']}"
            + (f" ({lo} to {hi} per subject, median {med:g})" if t["subjects"] > 1 else "")
            + f"; {t['censored']} below LLOQ",
            f"- **doses:** {t['doses']}" + (" (per kg body weight)" if study.dose_per_weight else ""),
            f"- **time span:** {first:g} to {last:g} {study.time_unit}",
            "- **units:** " + (", ".join(f"{k} {v}" for k, v in study.units.items() if v) or "not stated in the file")]
    out += [f"  - {note}" for note in settings.get("unit_notes") or ()]
    keys = (("models", "models"), ("error", "error model"), ("strategy", "strategy"), ("seed", "seed"),
            ("blq", "below LLOQ"), ("pooled", "pooled"), ("profile", "profile likelihood"),
            ("bootstrap", "bootstrap replicates"), ("fixed", "held fixed"), ("estimate", "also estimated"))
    for k, label in keys:
        v = settings.get(k)
        if v in (None, False, (), [], {}, 0) and k != "seed":
            continue
        if isinstance(v, Mapping):
            v = ", ".join(f"{a} = {fmt(b)}" for a, b in v.items())
        elif isinstance(v, (list, tuple)):
            v = ", ".join(map(str, v))
        elif v is True:
            v = "yes"
        out.append(f"- **{label}:** {v}")
    out.append("")
    by_subject: dict[str, list[Any]] = {}
    for f in cohort.fits:
        by_subject.setdefault(f.subject, []).append(f)
    stems = {safe_name(s.id): s.id for s in study.subjects}
    subject_plots = {stems.get(p.stem.removeprefix("subject_"), p.stem): p for p in plots.get("subject", [])}
    for sid, fits in by_subject.items():
        out += [f"## Subject {sid}", ""]
        shown = subject_plots if sid == "pooled" and sid not in subject_plots else \
            ({sid: subject_plots[sid]} if sid in subject_plots else {})
        for who, path in shown.items():
            out += [f"![Subject {who}: data and fitted curves]({_link(path, base)})", ""]
        for f in fits:
            out += _fit_section(f, checks)
        c = cohort.comparisons.get(sid)
        if c is not None:
            crit = c.criterion.upper()
            rows = [[m, fmt(c.aic[m], 5), fmt(c.aicc[m], 5), fmt(c.bic[m], 5), fmt(c.delta[m], 3), fmt(c.weights[m], 3),
                     "preferred" if m == c.preferred else ""] for m in sorted(c.models, key=lambda k: c.delta[k])]
            rows += [[m, "—", "—", "—", "—", "—", f"failed: {why}"] for m, why in c.failed.items()]
            out += ["### Models compared", "",
                    md_table(["model", "AIC", "AICc", "BIC", f"Δ{crit}", "weight", ""], rows,
                             [False, True, True, True, True, True, False]), "", comparison_sentence(c), ""]
    if len(by_subject) > 1 or plots.get("observed_predicted"):
        out += ["## All subjects", ""]
        if cohort.comparisons and len(by_subject) > 1:
            rows = [[sid, c.preferred or "—", fmt(c.weights.get(c.preferred), 3) if c.preferred else "—",
                     c.runner_up or "—", fmt(c.margin, 3), c.evidence] for sid, c in cohort.comparisons.items()]
            out += [md_table(["subject", "preferred", "weight", "runner-up", "margin", "evidence"], rows), ""]
        out += _cohort_tables(cohort)
        for kind, label in (("observed_predicted", "Observed against predicted"), ("residuals", "Residuals"),
                            ("parameters", "Estimates across subjects"), ("covariates", "Estimates against covariates"),
                            ("groups", "Estimates by group"), ("profiles", "Profile likelihood")):
            for p in plots.get(kind, []):
                out += [f"![{label}: {p.stem}]({_link(p, base)})", ""]
    n_fail = sum(not f.ok for f in cohort.fits)
    out += [f"_{len(cohort.fits)} fit(s): {len(cohort.fits) - n_fail} ok, {n_fail} failed._", ""]
    out += ["## Read before use", ""] + [f"- {c}" for c in CAUTIONS] + [""]
    return "\n".join(out)
