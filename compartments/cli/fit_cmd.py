"""``compartments fit``: fit every subject with every model, report, and write the files.

Order of work, so that bad input leaves nothing behind: check every option and output
target, load the templates, read the data, and only then fit; files are written at the
end (each atomically; ``--out`` and the plot folder of ``--report`` are built beside
their final place and swapped in whole).

Exit codes: 0 every fit succeeded; 3 the run finished but at least one fit failed (the
report and files are still written and list the failures); 2 bad input (one line on
stderr, nothing written); 130 interrupted (finished fits are reported and, with a run
directory, kept for ``--resume``).
"""

from __future__ import annotations

import sys
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import typer

from ..errors import UsageError
from . import app
from .data_cmd import (
    BLQ_OPT,
    DATA_ARG,
    DOSE_COLUMN_OPT,
    DOSE_OPT,
    DOSE_TIME_OPT,
    DURATION_OPT,
    MAP_OPT,
    OUT_OPT,
    OVERWRITE_OPT,
    QUIET_OPT,
    ROUTE_OPT,
    SHEET_OPT,
    SUBJECT_OPT,
    TIME_UNIT_OPT,
    UNITS_OPT,
    OutputFolder,
    check_target,
    choice,
    load_study,
    positive,
    split_list,
)
from .options import can_write_in, parse_assignments

ERROR_CHOICES = ("additive", "proportional", "combined", "lognormal")
STRATEGY_CHOICES = ("hybrid", "nls", "network", "multistart")

#: Exit code of a run that finished with at least one failed fit.
EXIT_SOME_FAILED = 3
EXIT_INTERRUPTED = 130
#: Most bootstrap replicates per fit (each is a full refit).
MAX_BOOTSTRAP = 10_000


def _templates(models: Sequence[str], search: Sequence[Path]) -> list[Any]:
    from ..library import load_template

    names = split_list(models)
    if not names:
        raise UsageError("no model given; name one or more with --model (see 'compartments templates')")
    out = [load_template(n, search=search) for n in names]
    seen: dict[str, str] = {}
    for n, t in zip(names, out, strict=True):
        if t.name in seen:
            raise UsageError(f"--model {n!r} and --model {seen[t.name]!r} are both named {t.name!r}; "
                             "results are keyed by template name: give each model once")
        seen[t.name] = n
    units = {t.time_unit for t in out}
    if len(units) > 1:
        listed = ", ".join(f"{t.name} in {t.time_unit}" for t in out)
        raise UsageError(f"the models use different time units ({listed}); fit them in separate runs")
    return out


def _unit_notes(study: Any, templates: Sequence[Any]) -> list[str]:
    """What the study's units mean for the pharmacokinetic templates' estimates (each once)."""
    from ..io.units import check_units

    notes: dict[str, None] = {}
    for t in templates:
        if t.kind == "pk":
            notes.update(dict.fromkeys(check_units(study, t)))
    return list(notes)


def _settings(cohort: Any, extra: Mapping[str, Any]) -> dict[str, Any]:
    settings = dict(cohort.settings)
    settings.update({k: v for k, v in extra.items() if v is not None})
    return settings


@app.command("fit")
def fit_command(
    data: Path = DATA_ARG,
    model: list[str] = typer.Option(..., "--model", "-m", metavar="NAME",
                                    help="Template name or path to a template file (repeatable, or comma-separated)."),
    map_: list[str] = MAP_OPT,
    dose_column: str | None = DOSE_COLUMN_OPT,
    dose_time: float = DOSE_TIME_OPT,
    dose: float | None = DOSE_OPT,
    route: str | None = ROUTE_OPT,
    duration: float | None = DURATION_OPT,
    time_unit: str | None = TIME_UNIT_OPT,
    blq: str = BLQ_OPT,
    units: list[str] = UNITS_OPT,
    sheet: str | None = SHEET_OPT,
    error: str = typer.Option("additive", "--error", metavar="additive|proportional|combined|lognormal",
                              help="Residual error model. Proportional and log-normal error leave out samples the model predicts as exactly 0 (pre-dose), with a note; combined keeps them."),
    strategy: str = typer.Option("hybrid", "--strategy", metavar="hybrid|nls|network|multistart",
                                 help="hybrid: network stage then likelihood fit (default); nls: likelihood fit from "
                                      "the template defaults; network: network stage alone; multistart: many starts."),
    subject: list[str] = SUBJECT_OPT,
    pooled: bool = typer.Option(False, "--pooled", help="One parameter set for all subjects' data together."),
    profile: bool = typer.Option(False, "--profile", help="Also compute profile-likelihood intervals (slower)."),
    bootstrap: int = typer.Option(0, "--bootstrap", metavar="N", help="Parametric bootstrap replicates per fit (0: none)."),
    estimate: list[str] = typer.Option(None, "--estimate", metavar="NAME",
                                       help="Estimate a parameter the template holds fixed (e.g. tlag); repeatable."),
    fix: list[str] = typer.Option(None, "--fix", metavar="NAME=VALUE",
                                  help="Hold a parameter at a value (in the template's unit); repeatable."),
    json_out: Path | None = typer.Option(None, "--json", metavar="FILE", help="Write the run as one JSON document."),
    out: Path | None = OUT_OPT,
    report: Path | None = typer.Option(None, "--report", metavar="FILE.md",
                                       help="Write the report as Markdown, plots linked (into --out, or FILE_plots/)."),
    overwrite: bool = OVERWRITE_OPT,
    seed: int = typer.Option(0, "--seed", metavar="N", help="Seed of the run (each fit gets one derived from it)."),
    quiet: bool = QUIET_OPT,
    workers: int | None = typer.Option(None, "--workers", metavar="N",
                                       help="Processes to fit in (default: every usable core; 1: this process)."),
    scheduler: str | None = typer.Option(None, "--scheduler", metavar="ADDRESS",
                                         help="Run the fits on a Dask scheduler, e.g. tcp://10.0.0.5:8786."),
    fit_timeout: float | None = typer.Option(None, "--fit-timeout", metavar="S",
                                             help="Record a fit as failed when it runs longer than S seconds."),
    run_dir: Path | None = typer.Option(None, "--run-dir", metavar="DIR",
                                        help="Save each finished fit in this new folder, so the run can be resumed."),
    resume: Path | None = typer.Option(None, "--resume", metavar="DIR",
                                       help="Continue a run saved with --run-dir: finished fits are read back."),
    group_by: str | None = typer.Option(None, "--group-by", metavar="COL",
                                        help="Covariate column to compare groups of subjects by."),
    templates: list[Path] = typer.Option(None, "--templates", metavar="DIR",
                                         help="Folder with user template files (repeatable)."),
    title: str | None = typer.Option(None, "--title", metavar="TEXT", help="A title line for the report."),
) -> None:
    """Fit compartmental models to a study file, compare them, and report.

    Every subject is fitted with every --model. The report ends with cautions: results
    are for research use and are not clinical dosing advice.
    """
    # 1. options -------------------------------------------------------------------------------
    error_v = choice(error, "--error", ERROR_CHOICES) or "additive"
    strategy_v = choice(strategy, "--strategy", STRATEGY_CHOICES) or "hybrid"
    fixed = parse_assignments(fix, "--fix")
    also = split_list(estimate)
    if bootstrap < 0:
        raise UsageError(f"--bootstrap {bootstrap} must be 0 or more")
    if bootstrap > MAX_BOOTSTRAP:
        raise UsageError(f"--bootstrap {bootstrap} is more than {MAX_BOOTSTRAP} replicates per fit; "
                         "1000 are usually enough")
    if seed < 0:
        raise UsageError(f"--seed {seed} must be 0 or more")
    if workers is not None and workers < 1:
        raise UsageError(f"--workers {workers} must be 1 or more")
    positive(fit_timeout, "--fit-timeout")
    if run_dir is not None and resume is not None:
        raise UsageError("give --run-dir to start a saved run or --resume to continue one, not both")
    if resume is not None and not resume.is_dir():
        raise UsageError(f"--resume {resume}: no such folder; give the --run-dir folder of the earlier run")
    if run_dir is not None and run_dir.exists() and (not run_dir.is_dir() or any(run_dir.iterdir())):
        raise UsageError(f"--run-dir {run_dir} exists and is not an empty folder; use --resume {run_dir} to "
                         "continue that run, or choose a new folder")
    for option, folder_ in (("--run-dir", run_dir), ("--resume", resume)):
        if folder_ is None:
            continue
        where = folder_ if folder_.is_dir() else (folder_.parent if str(folder_.parent) else Path("."))
        if not where.is_dir():
            raise UsageError(f"{option} {folder_}: folder {where} does not exist; create it first")
        if not can_write_in(where):
            raise UsageError(f"{option} {folder_}: folder {where} is not writable; choose another place")

    # 2. output targets ------------------------------------------------------------------------
    folder = OutputFolder(out, overwrite) if out is not None else None
    json_stage = folder.inside(json_out) if folder is not None else None
    report_stage = folder.inside(report) if folder is not None else None
    if json_out is not None and json_stage is None:
        check_target(json_out, overwrite, "--json")
    plot_folder: OutputFolder | None = None
    if report is not None and report_stage is None:
        check_target(report, overwrite, "--report")
        if folder is None:
            plot_folder = OutputFolder(report.with_name(report.stem + "_plots"), overwrite, "--report plots folder")
    # 3. templates and data --------------------------------------------------------------------
    from ..cohort import run_cohort

    tmpl = _templates(model, templates or ())
    from ..estimate.problem import check_fixed

    for t in tmpl:  # a value out of a template's range is bad input, not a failed fit
        check_fixed(t, fixed)
    study = load_study(data, map_=map_, dose_column=dose_column, dose_time=dose_time, dose=dose, route=route,
                       duration=duration, time_unit=time_unit, blq=blq, units=units, sheet=sheet,
                       time_axis=tmpl[0].time_unit, subjects=subject)
    from ..estimate.hybrid import needs_doses
    from ..io.units import units_from_data

    tmpl = [units_from_data(study, t) for t in tmpl]  # labels in the data's units (L/kg, ng/mL, ...)
    if all(needs_doses(t) for t in tmpl) and not any(s.doses for s in study.subjects):
        raise UsageError(f"{data}: no subject has a dose, and without one {', '.join(t.name for t in tmpl)} "
                         "predict(s) only zeros; give --dose AMOUNT with --route ROUTE, or --dose-column COL")
    if group_by is not None and group_by not in study.covariate_names:
        have = ", ".join(study.covariate_names) or "none"
        raise UsageError(f"--group-by {group_by!r} is not a covariate column of {data}; covariates: {have}")

    # 4. fit -----------------------------------------------------------------------------------
    from contextlib import nullcontext

    from ..report.cohort import CohortProgress

    bar = nullcontext(None) if quiet else CohortProgress(transient=True)
    with bar as progress:
        cohort = run_cohort(study, tmpl, error=error_v, strategy=strategy_v, seed=seed, pooled=pooled,
                            profile=profile, bootstrap=bootstrap, fixed=fixed or None, estimate=tuple(also),
                            workers=workers, scheduler=scheduler, fit_timeout=fit_timeout,
                            run_dir=resume if resume is not None else run_dir, resume=resume is not None,
                            progress=progress)

    # 5. report --------------------------------------------------------------------------------
    from rich.console import Console

    from ..report.export import cross_checks
    from ..report.tables import fit_report

    settings = _settings(cohort, {
        "title": title, "data": str(data), "models": [t.name for t in tmpl],
        "model_sources": {t.name: t.source for t in tmpl}, "blq": blq, "dose_column": dose_column,
        "dose": dose, "route": route, "dose_time": dose_time, "duration": duration, "time_unit": time_unit,
        "map": split_list(map_) or None, "group_by": group_by,
        "unit_notes": _unit_notes(study, tmpl) or None,
    })
    checks = cross_checks(cohort, study)
    console = Console()
    console.print(fit_report(cohort, study, settings, checks, quiet=quiet, group_by=group_by))

    # 6. files ---------------------------------------------------------------------------------
    written = _write_files(cohort, study, settings, checks, folder=folder, json_out=json_out, json_stage=json_stage,
                           report=report, report_stage=report_stage, plot_folder=plot_folder, group_by=group_by)
    for line in written:
        console.print(line, highlight=False)
    if cohort.interrupted:
        typer.echo(f"compartments: interrupted; {cohort.resume_hint()}", err=True)
        sys.exit(EXIT_INTERRUPTED)
    if cohort.n_failed:
        sys.exit(EXIT_SOME_FAILED)


def _write_files(cohort: Any, study: Any, settings: Mapping[str, Any], checks: Any, *, folder: OutputFolder | None,
                 json_out: Path | None, json_stage: Path | None, report: Path | None, report_stage: Path | None,
                 plot_folder: OutputFolder | None, group_by: str | None = None) -> list[str]:
    """Write JSON, CSV, plots and Markdown; return one line per thing written."""
    from ..report.export import run_document, write_csv_tables, write_json
    from ..report.markdown import markdown_report
    from ..report.plots import write_plots

    lines: list[str] = []
    plots: dict[str, list[Path]] = {}
    try:
        if folder is not None:
            staging = folder.open()
            write_csv_tables(cohort, staging, checks)
            plots = write_plots(cohort, study, staging, group_by=group_by)
        elif plot_folder is not None:
            plots = write_plots(cohort, study, plot_folder.open(), group_by=group_by)
        if json_out is not None:
            target = folder.open() / json_stage if folder is not None and json_stage is not None else json_out
            if json_stage is not None:
                target.parent.mkdir(parents=True, exist_ok=True)
            write_json(run_document(cohort, study, settings, checks), target)
        if report is not None:
            from ..atomic import write_text

            if folder is not None:
                final_plots = _relocate(plots, folder.open(), folder.path)
            elif plot_folder is not None:
                final_plots = _relocate(plots, plot_folder.open(), plot_folder.path)
            else:
                final_plots = plots
            text = markdown_report(cohort, study, settings, checks, plots=final_plots, base=report.parent)
            target = folder.open() / report_stage if folder is not None and report_stage is not None else report
            target.parent.mkdir(parents=True, exist_ok=True)
            write_text(target, text)
        if folder is not None:
            folder.commit()
            lines.append(f"wrote tables and plots to {folder.path}")
        if plot_folder is not None:
            plot_folder.commit()
            lines.append(f"wrote plots to {plot_folder.path}")
    finally:
        if folder is not None:
            folder.discard()
        if plot_folder is not None:
            plot_folder.discard()
    if json_out is not None:
        lines.append(f"wrote {json_out}")
    if report is not None:
        lines.append(f"wrote {report}")
    return lines


def _relocate(plots: Mapping[str, Sequence[Path]], old: Path, new: Path) -> dict[str, list[Path]]:
    """Plot paths as they will be once the staging folder ``old`` is moved to ``new``."""
    out: dict[str, list[Path]] = {}
    for k, paths in plots.items():
        out[k] = []
        for p in paths:
            try:
                out[k].append(new / Path(p).relative_to(old))
            except ValueError:
                out[k].append(Path(p))
    return out
