"""Rich renderable of what a study file held and how it was read (``compartments inspect``)."""

from __future__ import annotations

from rich.console import Group, RenderableType
from rich.table import Table
from rich.text import Text

from ..study import Study

NOTES_SHOWN = 20


def _num(x: object) -> str:
    if isinstance(x, float):
        return f"{x:g}"
    return "—" if x is None else str(x)


def totals_table(study: Study) -> Table:
    """Study-wide totals: subjects, observations, doses, censoring, time span, units."""
    t = study.summary_totals()
    lo, med, hi = t["obs_per_subject"]  # type: ignore[misc]
    first, last = t["time_span"]  # type: ignore[misc]
    units = ", ".join(f"{k} {v}" for k, v in study.units.items() if v) or "not stated"
    table = Table(title=f"Study {study.source or ''}".strip(), show_header=False, expand=False)
    table.add_column("what", style="bold")
    table.add_column("value")
    rows = [
        ("subjects", str(t["subjects"])),
        ("observations", f"{t['observations']} ({lo}–{hi} per subject, median {med:g})"),
        ("doses", str(t["doses"]) + (" (per kg of body weight)" if study.dose_per_weight else "")),
        ("censored (below LLOQ)", str(t["censored"])),
        ("time span", f"{first:g} to {last:g} {study.time_unit}"),
        ("covariates", ", ".join(t["covariates"]) or "none"),  # type: ignore[arg-type]
        ("units", units),
        ("dose layout", str(study.settings.get("dose_layout_used", "—"))),
        ("notes", str(t["notes"])),
        ("skipped subjects", str(t["skipped"])),
    ]
    if study.sha256:
        rows.append(("sha256", study.sha256[:16] + "…"))
    for what, value in rows:
        table.add_row(what, value)
    return table


def subjects_table(study: Study) -> Table:
    """One row per subject: counts, first and last time, covariates."""
    frame = study.summary()
    table = Table(title="Subjects", expand=False)
    for col in frame.columns:
        name = {"first_time": f"first ({study.time_unit})", "last_time": f"last ({study.time_unit})"}.get(col, col)
        table.add_column(str(name), justify="left" if col == "subject" else "right")
    for rec in frame.itertuples(index=False):
        table.add_row(*(_num(x) for x in rec))
    return table


def notes_list(study: Study, limit: int = NOTES_SHOWN) -> Text:
    """The first ``limit`` read notes, with a count of the rest."""
    text = Text()
    text.append(f"Read notes ({len(study.notes)})\n", style="bold")
    if not study.notes:
        text.append("  none: every row was read as written\n")
    for note in study.notes[:limit]:
        text.append(f"  • {note}\n")
    if len(study.notes) > limit:
        text.append(f"  … and {len(study.notes) - limit} more (Study.notes holds them all)\n")
    return text


def skipped_list(study: Study) -> Text:
    """Subjects with no usable observation, with the reason."""
    text = Text()
    text.append(f"Skipped subjects ({len(study.skipped)})\n", style="bold")
    for line in study.skipped:
        text.append(f"  • {line}\n")
    return text


def study_summary(study: Study) -> Group:
    """Totals, the per-subject table, the read notes and the skipped subjects.

    Examples
    --------
    >>> from io import StringIO
    >>> from rich.console import Console
    >>> import pandas as pd
    >>> from compartments.study import read_study
    >>> study = read_study(pd.DataFrame({"id": [1, 1], "time": [1, 2], "conc": [3.0, 2.0]}), dose=10, route="iv")
    >>> console = Console(file=StringIO(), width=100)
    >>> console.print(study_summary(study))
    >>> "observations" in console.file.getvalue()
    True
    """
    parts: list[RenderableType] = [totals_table(study), subjects_table(study), notes_list(study)]
    if study.skipped:
        parts.append(skipped_list(study))
    return Group(*parts)
