"""``compartments compare RUN1.json RUN2.json ...``: saved runs side by side.

Reads the documents written by ``compartments fit --json`` (schema ``compartments.fit/1``)
and shows, per run, which models the subjects prefer, and per model each estimate's
geometric mean and spread in every run with a test of whether the runs differ
(Mann–Whitney U for two runs, Kruskal–Wallis for more; exploratory). Two arms fitted
separately, or the same study fitted with two settings, are compared this way.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import typer

from ..errors import UsageError
from . import app

SCHEMA_PREFIX = "compartments.fit/"
#: Settings that change estimates; runs that differ in them are flagged.
SHAPING = ("error", "strategy", "seed", "pooled", "fixed", "estimate")


def read_run(path: Path) -> dict[str, Any]:
    """A run document, checked to be one (one-line errors naming the file)."""
    if not path.exists():
        raise UsageError(f"{path}: no such file; give the JSON files written by 'compartments fit --json'")
    if path.is_dir():
        raise UsageError(f"{path}: is a folder; give a JSON file written by 'compartments fit --json'")
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise UsageError(f"{path}: not a text file; give a JSON file written by 'compartments fit --json'") from None
    except json.JSONDecodeError as exc:
        raise UsageError(f"{path}, line {exc.lineno}: not valid JSON ({exc.msg}); give a file written by "
                         "'compartments fit --json'") from None
    schema = doc.get("schema") if isinstance(doc, dict) else None
    if not isinstance(schema, str) or not schema.startswith(SCHEMA_PREFIX):
        raise UsageError(f"{path}: not a run document (schema {schema!r}, expected {SCHEMA_PREFIX}1); give a file "
                         "written by 'compartments fit --json'")
    if schema != f"{SCHEMA_PREFIX}1":
        raise UsageError(f"{path}: schema {schema!r} is newer than this program reads ({SCHEMA_PREFIX}1); "
                         "update compartments")
    if not isinstance(doc.get("fits"), list):
        raise UsageError(f"{path}: the document has no list of fits ('fits'); it may be damaged")
    return doc


def run_labels(paths: Sequence[Path], labels: Sequence[str]) -> list[str]:
    """``--label`` values, else file names without extension (made unique)."""
    if labels:
        if len(labels) != len(paths):
            raise UsageError(f"--label given {len(labels)} time(s) for {len(paths)} run(s); give one per run or none")
        out = list(labels)
    else:
        out = [p.stem for p in paths]
        if len(set(out)) != len(out):
            out = [f"{p.parent.name}/{p.stem}" if out.count(p.stem) > 1 else p.stem for p in paths]
    if len(set(out)) != len(out):
        raise UsageError("two runs have the same label; give distinct --label values")
    if any(":" in x or not x.strip() for x in out):
        raise UsageError("a run label may not be empty or contain ':'; give other --label values")
    return out


def _differences(docs: Mapping[str, Mapping[str, Any]]) -> list[str]:
    out = []
    for key in SHAPING:
        values = {label: json.dumps(d.get("settings", {}).get(key), sort_keys=True) for label, d in docs.items()}
        if len(set(values.values())) > 1:
            out.append(f"{key} ({', '.join(f'{k}: {json.loads(v)}' for k, v in values.items())})")
    return out


def runs_table(paths: Sequence[Path], docs: Mapping[str, Mapping[str, Any]]) -> Any:
    from rich import box
    from rich.table import Table

    t = Table(title="Runs", title_justify="left", title_style="bold", box=box.SIMPLE_HEAD, show_edge=False,
              pad_edge=False)
    for col in ("run", "data", "subjects", "fits", "failed", "strategy", "error"):
        t.add_column(col, justify="right" if col in ("subjects", "fits", "failed") else "left")
    for path, (label, d) in zip(paths, docs.items(), strict=True):
        fits = d.get("fits", [])
        settings = d.get("settings", {}) or {}
        source = (d.get("input", {}) or {}).get("file") or "—"
        name = label if label == path.stem else f"{label} ({path.name})"
        t.add_row(name, Path(str(source)).name, str(len({f.get("subject") for f in fits})), str(len(fits)),
                  str(sum(f.get("status") != "ok" for f in fits)), str(settings.get("strategy", "—")),
                  str(settings.get("error", "—")))
    return t


def preference_side_by_side(runs: Mapping[str, Any], criterion: str) -> Any:
    """Rows: models; columns per run: preferred (of subjects) and the summed criterion."""
    from rich import box
    from rich.console import Group
    from rich.table import Table
    from rich.text import Text

    from ..report.cohort import CRITERION_LABEL
    from ..report.tables import fmt
    from ..summaries import model_preference

    crit = CRITERION_LABEL[criterion]
    frames = {label: model_preference(fits, criterion) for label, fits in runs.items()}
    models = list(dict.fromkeys(m for f in frames.values() for m in f.index))
    t = Table(title="Models across subjects, per run", title_justify="left", title_style="bold", box=box.SIMPLE_HEAD,
              show_edge=False, pad_edge=False)
    t.add_column("model")
    for label in frames:
        t.add_column(f"{label}\npreferred", justify="right")
        t.add_column(f"{label}\nΔ Σ {crit}", justify="right")
    for m in models:
        cells = []
        for f in frames.values():
            if m not in f.index:
                cells += ["—", "—"]
                continue
            r = f.loc[m]
            decided = sum(int(x) for x in f["preferred"])
            failed = f" ({int(r['failed'])} failed)" if r["failed"] else ""
            cells += [f"{int(r['preferred'])} of {decided}{failed}",
                      fmt(r["delta_summed"], 4) if math.isfinite(r["delta_summed"]) else "—"]
        t.add_row(m, *cells)
    return Group(t, Text(f"preferred: subjects where the model has the lowest {crit}, of those with a model fitted; "
                         f"Δ Σ {crit}: summed over the subjects where every model was fitted, from the lowest sum.",
                         style="dim"))


@app.command("compare")
def compare_command(
    runs: list[Path] = typer.Argument(..., metavar="RUN.json...",
                                      help="Run documents written by 'compartments fit --json'."),
    model: list[str] = typer.Option(None, "--model", "-m", metavar="NAME",
                                    help="Only these models (repeatable); default every model in the runs."),
    label: list[str] = typer.Option(None, "--label", metavar="NAME",
                                    help="A name per run, in the order given (default: the file names)."),
    criterion: str = typer.Option("aic", "--criterion", metavar="aic|aicc|bic",
                                  help="Criterion for the preferred model."),
    out: Path | None = typer.Option(None, "--out", metavar="DIR",
                                    help="Also write the tables as CSV files into this new folder."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an output folder this program wrote before."),
) -> None:
    """Tabulate saved runs side by side: model preference, estimates per run, and tests
    of whether the runs differ (exploratory)."""
    from rich.console import Console
    from rich.text import Text

    from ..report.cohort import failures_table, group_table
    from ..report.tables import cautions_panel
    from ..summaries import failures, fits_from_document, group_summary, group_tests, pool_runs
    from .data_cmd import OutputFolder, choice

    crit = choice(criterion, "--criterion", ("aic", "aicc", "bic")) or "aic"
    folder = OutputFolder(out, overwrite) if out is not None else None
    labels = run_labels(runs, label or [])
    docs = {lab: read_run(p) for lab, p in zip(labels, runs, strict=True)}
    fits = {lab: fits_from_document(d) for lab, d in docs.items()}
    present = list(dict.fromkeys(f.template for fs in fits.values() for f in fs))
    models = list(dict.fromkeys(model or [])) or present
    missing = [m for m in models if m not in present]
    if missing:
        raise UsageError(f"--model {', '.join(missing)}: not in these runs; they hold {', '.join(present) or 'no fits'}")
    fits = {lab: [f for f in fs if f.template in models] for lab, fs in fits.items()}
    pooled, cov = pool_runs(fits)

    console = Console()
    console.print(runs_table(runs, docs))
    diffs = _differences(docs)
    if diffs:
        console.print(Text("The runs were made with different settings: " + "; ".join(diffs) +
                           ". Differences in the estimates may come from the settings as well as the data.",
                           style="yellow"))
    if len(models) > 1:
        console.print(preference_side_by_side(fits, crit))
    tables: dict[str, Any] = {}
    for m in models:
        summary = group_summary(pooled, cov, "run", m, order=labels)
        tests = group_tests(pooled, cov, "run", m, order=labels)
        if len(summary) == 0:
            console.print(Text(f"No successful fit of {m} in these runs.", style="red"))
            continue
        console.print(group_table(summary, tests))
        tables[m] = (summary, tests)
    fail = failures_table(failures(pooled))
    if fail is not None:
        console.print(fail)
    console.print(cautions_panel())
    if folder is not None:
        _write_tables(folder, fits, tables, crit)
        console.print(f"Tables written to {folder.path}", highlight=False)


def _write_tables(folder: Any, runs: Mapping[str, Any], tables: Mapping[str, Any], criterion: str) -> None:
    import pandas as pd

    from ..report.export import write_frame
    from ..summaries import model_preference

    staging = folder.open()
    try:
        prefs = [model_preference(fits, criterion).reset_index().assign(run=label) for label, fits in runs.items()]
        write_frame(pd.concat(prefs, ignore_index=True), staging / "models.csv")
        summaries = [s.reset_index().assign(model=m) for m, (s, _) in tables.items()]
        tests = [t.reset_index().assign(model=m) for m, (_, t) in tables.items()]
        if summaries:
            write_frame(pd.concat(summaries, ignore_index=True), staging / "parameters_by_run.csv")
            write_frame(pd.concat(tests, ignore_index=True), staging / "tests_between_runs.csv")
        folder.commit()
    except BaseException:
        folder.discard()
        raise
