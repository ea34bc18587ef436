"""``compartments inspect`` and ``compartments nca``, and the data options every command shares.

The data options (``--map``, ``--dose-column``, ``--dose``, ``--route``, ...) are declared
once here and passed to :func:`compartments.study.read_study` by :func:`load_study`; the
output-folder handling shared with ``fit`` (refuse an existing folder without
``--overwrite``, build the new one beside it, swap it in at the end) is
:class:`OutputFolder`.
"""

from __future__ import annotations

import math
import os
import shutil
import tempfile
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import typer

from ..errors import UsageError
from . import app
from .options import can_write_in

#: A file inside every output folder this program writes; only such folders are replaced.
MARKER = ".compartments-output"

BLQ_CHOICES = ("censor", "drop", "half")
ROUTE_CHOICES = ("iv", "oral", "infusion")

DATA_ARG = typer.Argument(..., metavar="DATA", help="Study file: CSV, TSV, Excel (.xlsx) or Parquet.")
MAP_OPT = typer.Option(None, "--map", metavar="ROLE=COLUMN,...",
                       help="Say which column plays which role (subject, time, value, observable, dose, route, "
                            "duration, rate, lloq), e.g. --map subject=Patient,value='Conc (mg/L)'; or a TOML file "
                            "of role = \"Column\" lines. Unmapped roles are matched by plain words.")
DOSE_COLUMN_OPT = typer.Option(None, "--dose-column", metavar="COL",
                               help="A per-subject dose column: one dose per subject at --dose-time.")
DOSE_TIME_OPT = typer.Option(0.0, "--dose-time", metavar="T", help="Time of the per-subject or supplied dose (file time unit).")
DOSE_OPT = typer.Option(None, "--dose", metavar="AMOUNT", help="Dose given to every subject when the file has none (needs --route).")
ROUTE_OPT = typer.Option(None, "--route", metavar="iv|oral|infusion", help="Route of doses the file gives no route for.")
DURATION_OPT = typer.Option(None, "--duration", metavar="T", help="Infusion duration where the file gives neither duration nor rate.")
TIME_UNIT_OPT = typer.Option(None, "--time-unit", metavar="U",
                             help="Unit of the file's times (h, min, s, day, week); default: the time column's header, else hours.")
BLQ_OPT = typer.Option("censor", "--blq", metavar="censor|drop|half",
                       help="Values below the quantification limit: kept as censored (default), dropped, or set to LLOQ/2.")
UNITS_OPT = typer.Option(None, "--units", metavar="ROLE=UNIT,...",
                         help="Units the header does not state, e.g. --units value=mg/L,dose=mg/kg.")
SHEET_OPT = typer.Option(None, "--sheet", metavar="NAME", help="Workbook sheet (Excel); default the first.")
SUBJECT_OPT = typer.Option(None, "--subject", metavar="ID", help="Only these subjects (repeatable, or comma-separated).")
OUT_OPT = typer.Option(None, "--out", metavar="DIR", help="Write CSV tables (and plots) into this new folder.")
OVERWRITE_OPT = typer.Option(False, "--overwrite", help="Replace output files and folders this program wrote before.")
QUIET_OPT = typer.Option(False, "--quiet", "-q", help="Print only a short summary and the cautions.")


# -- option parsing -------------------------------------------------------------------------------
def split_list(items: Sequence[str] | None) -> list[str]:
    """``["a,b", "c"]`` → ``["a", "b", "c"]`` (blank entries dropped)."""
    return [x.strip() for item in items or [] for x in item.split(",") if x.strip()]


def parse_pairs(items: Sequence[str] | None, option: str, example: str) -> dict[str, str]:
    """``["subject=Patient,value=Conc"]`` → ``{"subject": "Patient", "value": "Conc"}``."""
    out: dict[str, str] = {}
    for piece in split_list(items):
        key, sep, value = piece.partition("=")
        if not sep or not key.strip() or not value.strip():
            raise UsageError(f"{option} {piece!r}: write ROLE=NAME, e.g. {option} {example}")
        out[key.strip()] = value.strip().strip("'\"")
    return out


def choice(value: str | None, option: str, choices: Sequence[str]) -> str | None:
    """``value`` if it is one of ``choices`` (case-insensitive), else a one-line UsageError."""
    if value is None:
        return None
    v = value.strip().lower()
    if v not in choices:
        raise UsageError(f"{option} {value!r} is not an option; use one of {', '.join(choices)}")
    return v


def positive(value: float | None, option: str, allow_zero: bool = False) -> float | None:
    """A finite number > 0 (or ≥ 0), else a one-line UsageError."""
    if value is None:
        return None
    if not math.isfinite(value) or value < 0 or (value == 0 and not allow_zero):
        raise UsageError(f"{option} {value:g} must be a finite number {'≥' if allow_zero else '>'} 0")
    return value


def columns_option(items: Sequence[str] | None) -> Mapping[str, str] | Path | None:
    """``--map``: a mapping, or the path of a TOML mapping file."""
    if not items:
        return None
    if len(items) == 1 and "=" not in items[0]:
        path = Path(items[0])
        if not path.is_file():
            raise UsageError(f"--map {items[0]!r}: no such mapping file; write ROLE=COLUMN pairs, "
                             "e.g. --map subject=Patient,time=Hours")
        return path
    return parse_pairs(items, "--map", "subject=Patient,time=Hours")


def load_study(data: Path, *, map_: Sequence[str] | None = None, dose_column: str | None = None,
               dose_time: float = 0.0, dose: float | None = None, route: str | None = None,
               duration: float | None = None, time_unit: str | None = None, blq: str = "censor",
               units: Sequence[str] | None = None, sheet: str | None = None, time_axis: str = "h",
               observables: Sequence[str] | None = None, subjects: Sequence[str] | None = None) -> Any:
    """Read the study with the command-line data options (errors are one line)."""
    from ..study import read_study

    blq_v = choice(blq, "--blq", BLQ_CHOICES) or "censor"
    positive(dose, "--dose")
    positive(duration, "--duration")
    positive(dose_time, "--dose-time", allow_zero=True)
    if not Path(data).exists():
        raise UsageError(f"{data}: no such file; give the path of a CSV, TSV, Excel or Parquet study file")
    if Path(data).is_dir():
        raise UsageError(f"{data} is a folder; give the path of a study file")
    study = read_study(data, columns=columns_option(map_), dose_column=dose_column, dose_time=dose_time, dose=dose,
                       route=route, duration=duration, time_unit=time_unit,
                       units=parse_pairs(units, "--units", "value=mg/L") or None, blq=blq_v,
                       sheet=sheet, observables=observables, time_axis=time_axis)
    wanted = split_list(subjects)
    if wanted:
        study = study.subset(wanted)
    return study


# -- output folders -------------------------------------------------------------------------------
def check_target(path: Path | None, overwrite: bool, option: str) -> Path | None:
    """Check a single output file can be written (parent exists and is writable; not there unless --overwrite)."""
    if path is None:
        return None
    parent = path.parent if str(path.parent) else Path(".")
    if path.exists() and path.is_dir():
        raise UsageError(f"{option} {path}: is a folder; give a file name")
    if path.exists() and not overwrite:
        raise UsageError(f"{option} {path} already exists; pass --overwrite to replace it or choose another name")
    if not parent.is_dir():
        raise UsageError(f"{option} {path}: folder {parent} does not exist; create it first")
    if not can_write_in(parent):
        raise UsageError(f"{option} {path}: folder {parent} is not writable; choose another place")
    return path


class OutputFolder:
    """A folder built beside its final place and swapped in whole at the end.

    An existing folder is refused without ``overwrite``, and replaced with it only when it
    holds the marker file this program writes (so a user's own folder is never deleted).
    Until :meth:`commit`, nothing at ``path`` changes; :meth:`discard` removes the
    staging folder.
    """

    def __init__(self, path: Path, overwrite: bool, option: str = "--out") -> None:
        self.path = Path(path)
        self.option = option
        parent = self.path.parent if str(self.path.parent) else Path(".")
        if self.path.exists():
            if not self.path.is_dir():
                raise UsageError(f"{option} {self.path}: a file of that name exists; choose a folder name")
            if not overwrite:
                raise UsageError(f"{option} {self.path} already exists; pass --overwrite to replace it "
                                 "or choose a new folder")
            if any(self.path.iterdir()) and not (self.path / MARKER).exists():
                raise UsageError(f"{option} {self.path} is not a folder this program wrote (no {MARKER} file); "
                                 "it will not be replaced: choose a new folder")
        if not parent.is_dir():
            raise UsageError(f"{option} {self.path}: folder {parent} does not exist; create it first")
        if not can_write_in(parent):
            raise UsageError(f"{option} {self.path}: folder {parent} is not writable; choose another place")
        self.parent = parent
        self.staging: Path | None = None

    def open(self) -> Path:
        """Create the staging folder and return it."""
        if self.staging is None:
            self.staging = Path(tempfile.mkdtemp(prefix=f".{self.path.name}.", suffix=".part", dir=self.parent))
            mask = os.umask(0)
            os.umask(mask)
            os.chmod(self.staging, 0o777 & ~mask)  # mkdtemp makes it private; an output folder is not
            (self.staging / MARKER).write_text("written by compartments; replaced with --overwrite\n", encoding="utf-8")
        return self.staging

    def inside(self, target: Path | None) -> Path | None:
        """``target`` relative to the folder when it lies inside it (else None)."""
        if target is None:
            return None
        try:
            rel = Path(os.path.abspath(target)).relative_to(os.path.abspath(self.path))
        except ValueError:
            return None
        return rel if str(rel) not in ("", ".") else None

    def commit(self) -> Path:
        """Move the staging folder into place (replacing an old output folder)."""
        staging = self.open()
        old: Path | None = None
        if self.path.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{self.path.name}.", suffix=".old", dir=self.parent))
            old.rmdir()
            os.replace(self.path, old)
        try:
            os.replace(staging, self.path)
        except OSError:
            if old is not None:
                os.replace(old, self.path)
            raise
        self.staging = None
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        return self.path

    def discard(self) -> None:
        """Remove the staging folder (nothing is left behind)."""
        if self.staging is not None:
            shutil.rmtree(self.staging, ignore_errors=True)
            self.staging = None


# -- inspect ---------------------------------------------------------------------------------------
@app.command("inspect")
def inspect_command(
    data: Path = DATA_ARG,
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
) -> None:
    """Show what a study file holds and how it was read: totals, subjects, every note."""
    from rich.console import Console

    from ..report.inspect import study_summary

    study = load_study(data, map_=map_, dose_column=dose_column, dose_time=dose_time, dose=dose, route=route,
                       duration=duration, time_unit=time_unit, blq=blq, units=units, sheet=sheet,
                       time_axis=time_unit or "h")
    Console().print(study_summary(study))


# -- nca -----------------------------------------------------------------------------------------
def nca_tables(results: Mapping[str, Any], study: Any) -> Any:
    """Rich tables of per-subject NCA results and their summary across subjects."""
    from rich import box
    from rich.console import Group
    from rich.table import Table
    from rich.text import Text

    from ..io.units import volume_units
    from ..nca import summarize
    from ..report.tables import WidthAware, fmt, fmt_pct

    conc = study.units.get("value", "") or ""
    dose_u = study.units.get("dose", "") or ""
    tu = study.time_unit
    vol, cl = volume_units(dose_u, conc, tu)
    routes = {r.route for r in results.values() if r.route}
    suffix = "/F" if routes == {"oral"} else ("" if routes and "oral" not in routes else " (/F if oral)")
    units = {
        "cmax": conc, "tmax": tu, "auc_last": f"{conc}·{tu}" if conc else tu, "auc_inf": f"{conc}·{tu}" if conc else tu,
        "auc_extrap_pct": "%", "lambda_z": f"1/{tu}", "half_life": tu, "cl": cl,
        "vz": vol, "mrt": tu,
    }
    labels = {"cmax": "Cmax", "tmax": "Tmax", "auc_last": "AUC0–tlast", "lambda_z": "λz", "half_life": "t½",
              "auc_inf": "AUC0–∞", "auc_extrap_pct": "% extrap.", "cl": f"CL{suffix}", "vz": f"Vz{suffix}",
              "mrt": "MRT"}
    def cell(r: Any, k: str) -> str:
        v = getattr(r, k)
        if k == "auc_extrap_pct":
            return fmt_pct(v) if v is not None else "—"
        if k == "lambda_z" and v is not None:
            return f"{fmt(v, 3)} ({r.lambda_z_points})"
        return fmt(v, 4)

    def per_table(title: str, keys: Sequence[str]) -> Table:
        t = Table(title=title, title_justify="left", title_style="bold", box=box.SIMPLE_HEAD, show_edge=False,
                  pad_edge=False)
        t.add_column("subject", overflow="fold")
        for k in keys:
            t.add_column(f"{labels[k]}\n{units[k]}".rstrip(), justify="right", overflow="fold")
        for sid, r in results.items():
            t.add_row(sid, *(cell(r, k) for k in keys))
        return t

    s = summarize(results)
    stats_cols = {"n": lambda st: str(st["n"]), "geometric mean": lambda st: fmt(st["geometric_mean"]),
                  "geometric CV %": lambda st: fmt_pct(st["geometric_cv_pct"]), "median": lambda st: fmt(st["median"]),
                  "min": lambda st: fmt(st["min"]), "max": lambda st: fmt(st["max"]),
                  "mean": lambda st: fmt(st["mean"]), "SD": lambda st: fmt(st["sd"])}

    def summary_table(title: str, cols: Sequence[str]) -> Table:
        t = Table(title=title, title_justify="left", title_style="bold", box=box.SIMPLE_HEAD, show_edge=False,
                  pad_edge=False)
        t.add_column("quantity", overflow="fold")
        t.add_column("unit", overflow="fold")
        for c in cols:
            t.add_column(c, justify="right", overflow="fold")
        for k, lab in labels.items():
            t.add_row(lab, units[k], *(stats_cols[c](s[k]) for c in cols))
        return t

    keys = list(labels)
    half = ["cmax", "tmax", "auc_last", "auc_inf", "auc_extrap_pct"]
    title = "Non-compartmental analysis per subject"
    per = WidthAware(per_table(title, keys), [per_table(f"{title}: exposure", half),
                                             per_table(f"{title}: elimination", [k for k in keys if k not in half])])
    cols = list(stats_cols)
    summ = WidthAware(summary_table("Across subjects", cols),
                      [summary_table("Across subjects", cols[:4]), summary_table("Across subjects (continued)", cols[4:])])
    notes = Text()
    for sid, r in results.items():
        for n in r.notes:
            notes.append(f"• subject {sid}: {n}\n")
    parts: list[Any] = [per, Text("λz: terminal rate constant (number of points used); rules: linear-up/log-down "
                                  "trapezoids, λz by best adjusted R² over ≥ 3 points after Cmax.", style="dim"), summ]
    if notes.plain:
        parts.append(Text("Notes", style="bold"))
        parts.append(notes)
    return Group(*parts)


@app.command("nca")
def nca_command(
    data: Path = DATA_ARG,
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
    subject: list[str] = SUBJECT_OPT,
    observable: str | None = typer.Option(None, "--observable", metavar="NAME",
                                          help="Which observable to analyse when the file has several."),
    out: Path | None = OUT_OPT,
    overwrite: bool = OVERWRITE_OPT,
    quiet: bool = QUIET_OPT,
) -> None:
    """Non-compartmental analysis per subject (Cmax, Tmax, AUC, λz, t½, CL, Vz, MRT) and across subjects."""
    from rich.console import Console

    from ..nca import nca_subject
    from ..report.export import nca_summary_frame, write_frame
    from ..report.tables import cautions_panel

    folder = OutputFolder(out, overwrite) if out is not None else None
    study = load_study(data, map_=map_, dose_column=dose_column, dose_time=dose_time, dose=dose, route=route,
                       duration=duration, time_unit=time_unit, blq=blq, units=units, sheet=sheet, subjects=subject)
    results = {s.id: nca_subject(s, observable=observable) for s in study.subjects}
    console = Console()
    if not quiet:
        console.print(nca_tables(results, study))
    if folder is not None:
        import pandas as pd

        from ..report.export import NCA_FIELDS, finite

        try:
            staging = folder.open()
            rows = [{"subject": sid, "route": r.route, "dose": finite(r.dose),
                     **{k: (finite(getattr(r, k)) if k != "lambda_z_points" else getattr(r, k)) for k in NCA_FIELDS},
                     "notes": " | ".join(r.notes)} for sid, r in results.items()]
            write_frame(pd.DataFrame(rows), staging / "nca.csv")
            write_frame(nca_summary_frame(results), staging / "nca_summary.csv")
            folder.commit()
        finally:
            folder.discard()
        console.print(f"wrote nca.csv and nca_summary.csv to {out}", highlight=False)
    console.print(cautions_panel())
