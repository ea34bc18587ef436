"""The terminal report of a fit run, as rich renderables.

Each function takes results and returns something :class:`rich.console.Console` can
print; nothing here estimates anything. Numbers are shown to four significant figures
(standard errors and intervals to three), always with their units.

Examples
--------
>>> from io import StringIO
>>> from rich.console import Console
>>> console = Console(file=StringIO(), width=100)
>>> console.print(cautions_panel())
>>> "Not clinical dosing advice" in console.file.getvalue()
True
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping, Sequence
from typing import Any

from rich import box
from rich.console import Console, ConsoleOptions, Group, RenderableType
from rich.measure import Measurement
from rich.panel import Panel
from rich.rule import Rule
from rich.table import Table
from rich.text import Text

from ..comparison import ModelComparison
from ..exposure import Exposure
from ..nca import NCAResult
from .export import CrossChecks, error_parameter_unit, residual_sd, residual_unit

CAUTIONS = (
    "For research use only.",
    "Not clinical dosing advice: nothing in this report recommends a dose for any patient or animal.",
    "The numbers depend on the model chosen and on the quality, timing and amount of the data; "
    "read the notes on each fit, the comparison and the plots before relying on them.",
    "Dosing decisions belong to licensed clinicians, under the regulations that apply where they practise.",
)

EXPOSURE_LABELS = {
    "auc_inf": "AUC0–∞",
    "cmax": "Cmax",
    "tmax": "Tmax",
    "mrt": "MRT",
    "half_life": "terminal t½",
}


# -- numbers ------------------------------------------------------------------------------------
def fmt(x: Any, sig: int = 4) -> str:
    """A number to ``sig`` significant figures; "—" when missing, "∞" when infinite.

    Examples
    --------
    >>> fmt(0.0539545), fmt(12.846872), fmt(123456.7), fmt(3.2e-7), fmt(None), fmt(float("nan"))
    ('0.05395', '12.85', '123457', '3.200e-07', '—', '—')
    """
    if x is None:
        return "—"
    try:
        v = float(x)
    except (TypeError, ValueError):
        return str(x)
    if math.isnan(v):
        return "—"
    if math.isinf(v):
        return "∞" if v > 0 else "−∞"
    if v == 0:
        return "0"
    e = math.floor(math.log10(abs(v)))
    if e >= 6 or e < -4:
        return f"{v:.{sig - 1}e}"
    return f"{v:.{max(sig - 1 - e, 0)}f}"


def fmt_ci(ci: tuple[float, float] | None, sig: int = 3) -> str:
    """``"1.08 to 2.92"``; "—" when the interval is missing."""
    if ci is None:
        return "—"
    lo, hi = ci
    if not (isinstance(lo, (int, float)) and isinstance(hi, (int, float))) or math.isnan(lo) or math.isnan(hi):
        return "—"
    return f"{fmt(lo, sig)} to {fmt(hi, sig)}"


def fmt_pct(x: Any) -> str:
    """A percentage to one decimal."""
    try:
        v = float(x)
    except (TypeError, ValueError):
        return "—"
    if not math.isfinite(v):
        return "—" if math.isnan(v) else "∞"
    return f"{v:.1f}"


class WidthAware:
    """``wide`` when it fits the console unwrapped, otherwise ``parts`` one after another
    (narrower tables that keep every number whole on an 80-column terminal)."""

    def __init__(self, wide: RenderableType, parts: Sequence[RenderableType]):
        self.wide = wide
        self.parts = tuple(parts)

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> Iterator[RenderableType]:
        need = Measurement.get(console, options.update(max_width=10**6), self.wide).maximum
        if need <= options.max_width or not self.parts:
            yield self.wide
        else:
            yield from self.parts


def _table(title: str | None = None) -> Table:
    return Table(title=title, title_justify="left", title_style="bold", box=box.SIMPLE_HEAD,
                 show_edge=False, pad_edge=False, expand=False)


# -- header and cautions -------------------------------------------------------------------------
def header(study: Any, settings: Mapping[str, Any]) -> Panel:
    """What was read and the settings used.

    Parameters
    ----------
    study : Study
    settings : mapping
        Keys used when present: title, models, error, strategy, seed, blq, subjects,
        pooled, profile, bootstrap, fixed, estimate, workers, scheduler.
    """
    t = study.summary_totals()
    lo, med, hi = t["obs_per_subject"]
    first, last = t["time_span"]
    data = _table("Data")
    data.add_column("", style="bold")
    data.add_column("")
    from pathlib import Path

    data.add_row("file", Path(str(study.source)).name if study.source else "—")
    if study.sha256:
        data.add_row("sha256", study.sha256[:16] + "…")
    data.add_row("subjects", f"{t['subjects']}" + (f", {t['skipped']} skipped" if t["skipped"] else ""))
    data.add_row("observations", f"{t['observations']}" + (f" ({lo} to {hi} per subject, median {med:g})"
                                                            if t["subjects"] > 1 else ""))
    data.add_row("below LLOQ", str(t["censored"]))
    data.add_row("doses", f"{t['doses']}" + (" (per kg body weight)" if study.dose_per_weight else ""))
    data.add_row("time span", f"{first:g} to {last:g} {study.time_unit}")
    units = ", ".join(f"{k} {v}" for k, v in study.units.items() if v) or "not stated in the file"
    data.add_row("units", units)
    if study.notes:
        data.add_row("read notes", f"{len(study.notes)} (listed by inspect)")
    run = _table("Settings")
    run.add_column("", style="bold")
    run.add_column("")
    labels = (("models", "models"), ("error", "error model"), ("strategy", "strategy"), ("seed", "seed"),
              ("blq", "below LLOQ"), ("subjects", "subjects fitted"), ("pooled", "pooled"),
              ("profile", "profile likelihood"), ("bootstrap", "bootstrap replicates"), ("fixed", "held fixed"),
              ("estimate", "also estimated"), ("workers", "workers"), ("scheduler", "scheduler"))
    for key, label in labels:
        v = settings.get(key)
        if v in (None, False, (), [], {}, 0) and key not in ("seed",):
            continue
        if isinstance(v, Mapping):
            v = ", ".join(f"{k} = {fmt(x)}" for k, x in v.items())
        elif isinstance(v, (list, tuple)):
            v = ", ".join(map(str, v)) if len(v) <= 6 or key != "subjects" else f"{len(v)} (all listed in the data)"
        elif v is True:
            v = "yes"
        run.add_row(label, str(v))
    grid = Table.grid(padding=(0, 4))
    grid.add_row(data, run)
    title = settings.get("title")
    body: list[RenderableType] = []
    if title:
        body.append(Text(str(title), style="bold"))
    body.append(grid)
    for note in settings.get("unit_notes") or ():
        body.append(Text(f"Units: {note}.", style="dim"))
    return Panel(Group(*body), title="compartments fit", title_align="left", box=box.ROUNDED)


def cautions_panel() -> Panel:
    """The closing cautions, shown after every report."""
    text = Text()
    for i, line in enumerate(CAUTIONS):
        text.append(("" if i == 0 else "\n") + "• " + line)
    return Panel(text, title="Read before use", title_align="left", border_style="yellow", box=box.ROUNDED)


# -- one fit ------------------------------------------------------------------------------------
def fmt_open_ci(ci: tuple[float, float] | None, sig: int = 3) -> str:
    """A profile-likelihood interval; an end the profile does not reach within the template's
    bounds (nan) reads "open".

    Examples
    --------
    >>> fmt_open_ci((1.2, float("nan"))), fmt_open_ci((0.5, 2.0)), fmt_open_ci(None)
    ('1.20 to open', '0.500 to 2.00', '—')
    """
    if ci is None:
        return "—"
    return " to ".join(fmt(v, sig) if isinstance(v, (int, float)) and math.isfinite(v) else "open" for v in ci)


#: The parameter table's own columns; profile and bootstrap columns follow when computed.
BASE_COLUMNS = ("parameter", "estimate", "unit", "SE", "RSE %", "95 % CI")


def parameter_columns(result: Any) -> tuple[list[str], list[list[str]], str | None]:
    """Header, rows and a note for the parameter table of a fit (terminal and Markdown).

    Estimate, unit, SE, %RSE and the Wald interval; then the profile-likelihood interval
    when profiles were computed, and the bootstrap SE and percentile interval when a
    bootstrap was run (the note gives its replicate counts).
    """
    header = list(BASE_COLUMNS)
    rows = [[n, fmt(result.estimates[n]), result.units.get(n, ""), fmt(result.se.get(n), 3),
             fmt_pct(result.rse.get(n)), fmt_ci(result.ci.get(n))] for n in result.parameter_names]
    notes = []
    profiles = result.profiles or {}
    if profiles:
        header.append("profile 95 % CI")
        for n, row in zip(result.parameter_names, rows, strict=True):
            row.append(fmt_open_ci(profiles[n].ci) if n in profiles else "—")
        if any(not all(math.isfinite(v) for v in p.ci) for p in profiles.values()):
            notes.append("profile: \"open\" where −2LL does not rise enough within the template's bounds")
    boot = result.bootstrap or {}
    if boot.get("n"):
        header += ["bootstrap SE", "bootstrap 95 % CI"]
        se, ci = boot.get("se") or {}, boot.get("ci") or {}
        for n, row in zip(result.parameter_names, rows, strict=True):
            row += [fmt(se.get(n), 3), fmt_ci(ci.get(n))]
        done = int(boot["n"]) - int(boot.get("failed", 0))
        notes.append(f"bootstrap: {done} of {int(boot['n'])} parametric replicates refitted, percentile interval")
    return header, rows, "; ".join(notes) or None


def parameter_table(result: Any) -> RenderableType:
    """Estimated parameters: estimate, unit, SE, %RSE, 95 % CI; the profile-likelihood and
    bootstrap intervals, when computed, in a second table below (so that an 80-column
    terminal shows every number whole)."""
    header, rows, note = parameter_columns(result)
    base = len(BASE_COLUMNS)
    tables = []
    for title, cols in (("Estimated parameters", range(base)),
                        ("Profile-likelihood and bootstrap intervals", [0, *range(base, len(header))])):
        if len(cols) <= 1:
            continue
        t = _table(title)
        for i in cols:
            t.add_column(header[i], justify="left" if i in (0, 2) else "right", overflow="fold")
        for row in rows:
            t.add_row(*(row[i] for i in cols))
        tables.append(t)
    if note:
        tables[-1].caption = note
        tables[-1].caption_justify = "left"
    return tables[0] if len(tables) == 1 else Group(*tables)


def derived_table(result: Any) -> Table | None:
    """Quantities the template derives from the parameters, with delta-method SE."""
    if not result.derived:
        return None
    t = _table("Derived from the parameters")
    t.add_column("quantity")
    t.add_column("value", justify="right")
    t.add_column("unit")
    t.add_column("SE", justify="right")
    t.add_column("meaning")
    for n, d in result.derived.items():
        t.add_row(n, fmt(d.value), d.unit, fmt(d.se, 3), d.description)
    return t


def exposure_table(e: Exposure, nca: NCAResult | None = None) -> Group:
    """Exposure read off the fitted curve, with the NCA value beside it when available."""
    t = _table("Exposure from the fitted curve")
    t.add_column("quantity")
    t.add_column("model", justify="right")
    if nca is not None:
        t.add_column("NCA", justify="right")
    t.add_column("unit")
    d = e.as_dict()
    nca_vals = {} if nca is None else {"auc_inf": nca.auc_inf, "cmax": nca.cmax, "tmax": nca.tmax, "mrt": nca.mrt,
                                       "half_life": nca.half_life}
    for key, label in EXPOSURE_LABELS.items():
        row = [label, fmt(d[key]["value"])]
        if nca is not None:
            row.append(fmt(nca_vals.get(key)))
        row.append(d[key]["unit"])
        t.add_row(*row)
    notes = list(e.notes) + ([f"NCA: {n}" for n in nca.notes] if nca is not None else [])
    if not notes:
        return Group(t)
    return Group(t, Text("\n".join(notes), style="dim"))


def quality_line(result: Any) -> Text:
    """Observations, −2 log-likelihood, AIC, AICc, BIC, residual SD."""
    r = result.residuals
    n_cens = int(r.censored.sum()) if r is not None else 0
    sd = residual_sd(result)
    parts = [
        f"{result.n_obs} observations" + (f" ({n_cens} below LLOQ)" if n_cens else ""),
        f"−2 log-likelihood {fmt(result.objective, 5)}",
        f"AIC {fmt(result.aic, 5)}",
        f"AICc {fmt(result.aicc, 5)}",
        f"BIC {fmt(result.bic, 5)}",
        f"residual SD {fmt(sd, 3)} {residual_unit(result)}".rstrip(),
    ]
    text = Text()
    text.append("Fit quality: ", style="bold")
    text.append(" · ".join(parts))
    return text


def _fixed_and_error(result: Any) -> Text | None:
    text = Text()
    t = result.model_template
    if result.fixed:
        text.append("Held fixed: ", style="bold")
        text.append(", ".join(f"{n} = {fmt(v)} {t.parameter(n).unit if t is not None else ''}".rstrip()
                              for n, v in result.fixed.items()))
    if result.error_parameters:
        if text.plain:
            text.append("\n")
        text.append(f"Error model ({result.error_model}): ", style="bold")
        items = []
        for n, v in result.error_parameters.items():
            unit = error_parameter_unit(n, result)
            if unit == "fraction":
                items.append(f"{n} = {fmt(v, 3)} ({fmt_pct(100 * v)} %)")
            else:
                items.append(f"{n} = {fmt(v, 3)} {unit}".rstrip())
        text.append(", ".join(items))
    return text if text.plain else None


def warnings_text(result: Any) -> Text | None:
    """The fit's warnings as a bulleted list of plain sentences."""
    if not result.warnings:
        return None
    text = Text()
    text.append("Notes on this fit\n", style="bold")
    text.append("\n".join(f"• {w}" for w in result.warnings))
    return text


def fit_panel(result: Any, nca: NCAResult | None = None, exposure: Exposure | None = None) -> Panel:
    """Everything about one subject × model fit; a failed fit shows its reason.

    Parameters
    ----------
    result : FitResult
    nca : NCAResult, optional
        Shown beside the exposure read off the fitted curve.
    exposure : Exposure, optional
        From :func:`compartments.exposure.exposure`.
    """
    title = f"{result.template} · subject {result.subject}"
    if not result.ok:
        body = Text()
        body.append("failed: ", style="bold red")
        body.append(result.message or "no reason was recorded")
        return Panel(body, title=title, title_align="left", subtitle="failed", subtitle_align="right",
                     border_style="red", box=box.ROUNDED)
    parts: list[RenderableType] = [
        Text(f"{result.strategy} strategy, {result.error_model} error, seed {result.seed}; "
             f"covariance: {result.covariance_method or '—'}", style="dim"),
        parameter_table(result),
    ]
    fe = _fixed_and_error(result)
    if fe is not None:
        parts.append(fe)
    dt = derived_table(result)
    if dt is not None:
        parts.append(dt)
    if exposure is not None:
        parts.append(exposure_table(exposure, nca))
    parts.append(quality_line(result))
    w = warnings_text(result)
    if w is not None:
        parts.append(w)
    return Panel(Group(*parts), title=title, title_align="left", subtitle="ok", subtitle_align="right",
                 border_style="green" if not result.warnings else "yellow", box=box.ROUNDED)


# -- model comparison ---------------------------------------------------------------------------
def comparison_sentence(c: ModelComparison) -> str:
    """Which model is preferred and by how much, in words."""
    crit = c.criterion.upper()
    if c.preferred is None:
        return f"Subject {c.subject}: no model could be fitted."
    if c.runner_up is None:
        return f"Subject {c.subject}: only {c.preferred} could be fitted."
    return (f"Subject {c.subject}: {c.preferred} is preferred, Δ{crit} {fmt(c.margin, 3)} "
            f"over {c.runner_up} (weight {fmt(c.weights[c.preferred], 3)}): {c.evidence}.")


def comparison_table(c: ModelComparison) -> Group:
    """AIC, AICc, BIC, Δ and Akaike weights of the models fitted to one subject."""
    crit = c.criterion.upper()
    t = _table(f"Models compared for subject {c.subject}")
    t.add_column("model")
    for col in ("AIC", "AICc", "BIC", f"Δ{crit}", "weight"):
        t.add_column(col, justify="right")
    t.add_column("")
    for m in sorted(c.models, key=lambda k: c.delta[k]):
        t.add_row(m, fmt(c.aic[m], 5), fmt(c.aicc[m], 5), fmt(c.bic[m], 5), fmt(c.delta[m], 3),
                  fmt(c.weights[m], 3), "preferred" if m == c.preferred else "")
    for m in c.failed:
        t.add_row(m, "—", "—", "—", "—", "—", "failed (reason above)")
    return Group(t, Text(comparison_sentence(c)))


def comparisons_overview(comparisons: Mapping[str, ModelComparison]) -> RenderableType:
    """One line per subject: the preferred model, its weight, the runner-up, the margin and
    the evidence in words (left out on a console too narrow for it: each subject's
    sentence above says it)."""
    first = next(iter(comparisons.values()), None)
    crit = (first.criterion if first else "aic").upper()

    def table(evidence: bool) -> Table:
        t = _table("Preferred model per subject")
        t.add_column("subject", overflow="fold")
        t.add_column("preferred", no_wrap=True)
        t.add_column("weight", justify="right")
        t.add_column("runner-up", no_wrap=True)
        t.add_column(f"Δ{crit}", justify="right")
        if evidence:
            t.add_column("evidence")
        t.add_column("failed", overflow="fold")
        for sid, c in comparisons.items():
            words = [c.evidence] if evidence else []
            t.add_row(sid, c.preferred or "—", fmt(c.weights.get(c.preferred), 3) if c.preferred else "—",
                      c.runner_up or "—", fmt(c.margin, 3), *words, ", ".join(c.failed) or "")
        return t

    return WidthAware(table(True), [table(False)])


def status_table(fits: Sequence[Any]) -> Table:
    """One line per fit: subject, model, status, AIC, and the reason of a failure."""
    t = _table("Fits")
    t.add_column("subject")
    t.add_column("model")
    t.add_column("status")
    t.add_column("AIC", justify="right")
    t.add_column("notes")
    for f in fits:
        note = f.message if not f.ok else (f"{len(f.warnings)} note(s)" if f.warnings else "")
        t.add_row(f.subject, f.template, f.status if f.ok else Text("failed", style="red"), fmt(f.aic, 5), note)
    return t


def _cohort_section(cohort: Any, study: Any, group_by: str | None) -> RenderableType | None:
    try:
        from .cohort import cohort_panel  # written with the cohort layer
    except ImportError:
        return None
    return cohort_panel(cohort, study=study, group_by=group_by)


def fit_report(cohort: Any, study: Any, settings: Mapping[str, Any], checks: CrossChecks | None = None, *,
               quiet: bool = False, group_by: str | None = None) -> Group:
    """The whole terminal report: header, each subject's fits and comparison, the cohort
    summary, and the cautions (always, also when quiet or when every fit failed).

    Parameters
    ----------
    cohort : CohortResult
    study : Study
    settings : mapping
    checks : CrossChecks, optional
        Exposure and NCA per subject.
    quiet : bool
        Leave out the header and the per-fit detail; keep a one-line status and the cautions.
    group_by : str, optional
        Covariate passed to the cohort summary.
    """
    checks = checks or CrossChecks()
    parts: list[RenderableType] = []
    n_ok = sum(f.ok for f in cohort.fits)
    n_fail = len(cohort.fits) - n_ok
    if not quiet:
        parts.append(header(study, settings))
        by_subject: dict[str, list[Any]] = {}
        for f in cohort.fits:
            by_subject.setdefault(f.subject, []).append(f)
        for sid, fits in by_subject.items():
            parts.append(Rule(f"Subject {sid}", align="left"))
            nca = checks.nca.get(sid)
            for f in fits:
                parts.append(fit_panel(f, nca=nca, exposure=checks.exposures.get((f.subject, f.template))))
            if sid in cohort.comparisons:
                parts.append(comparison_table(cohort.comparisons[sid]))
        if len(by_subject) > 1:
            parts.append(Rule("All subjects", align="left"))
            if cohort.comparisons:
                parts.append(comparisons_overview(cohort.comparisons))
            section = _cohort_section(cohort, study, group_by)
            if section is not None:
                parts.append(section)
            elif n_fail:
                parts.append(status_table(cohort.fits))
    summary = Text()
    summary.append(f"{len(cohort.fits)} fit(s): {n_ok} ok, {n_fail} failed.", style="bold")
    if quiet and n_fail:
        for f in cohort.fits:
            if not f.ok:
                summary.append(f"\n• {f.template} · subject {f.subject} failed: {f.message}")
    if getattr(cohort, "interrupted", False):
        summary.append("\nThe run was interrupted; finished results are kept.", style="yellow")
    parts.append(summary)
    parts.append(cautions_panel())
    return Group(*parts)
