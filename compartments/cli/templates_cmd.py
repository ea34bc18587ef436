"""``compartments templates``, ``show`` and ``simulate``."""

from __future__ import annotations

from pathlib import Path

import typer

from ..errors import UsageError
from . import app
from .options import (
    check_names,
    parse_assignments,
    parse_dose,
    parse_times,
    split_names,
    writable_target,
)

TEMPLATES_OPT = typer.Option(None, "--templates", metavar="DIR",
                             help="Folder with user template files (repeatable; also $COMPARTMENTS_TEMPLATES).")


@app.command("templates")
def templates_command(templates: list[Path] = TEMPLATES_OPT) -> None:
    """List the model templates: name, description, parameters with units."""
    from rich.console import Console

    from ..library import scan_templates
    from ..report.templates import template_list

    found, errors = scan_templates(templates or ())
    console = Console()
    console.print(template_list(found))
    for e in errors:
        console.print(f"[yellow]skipped a user template[/]: {e}", highlight=False)


@app.command("show")
def show_command(
    name: str = typer.Argument(..., help="Template name or path to a template file."),
    templates: list[Path] = TEMPLATES_OPT,
    setting: list[str] = typer.Option(None, "--set", metavar="NAME=VALUE",
                                      help="Override a template setting (e.g. n_transit=5)."),
    observe: list[str] = typer.Option(None, "--observe", metavar="NAME",
                                      help="Observables measured, for the identifiability answer (default all)."),
    route: list[str] = typer.Option(None, "--route", metavar="ROUTE",
                                    help="Dose routes used, each a separate occasion (default every route)."),
    known: list[str] = typer.Option(None, "--known", metavar="NAME",
                                    help="Parameters taken as known (default those the template holds fixed)."),
    timeout: float = typer.Option(10.0, "--timeout", help="Time bound of the identifiability answer (s)."),
) -> None:
    """Show a template: equations, parameters, units, dose inputs, derived quantities, and
    which parameters the observed outputs can identify at all (structural identifiability)."""
    from rich.console import Console

    from ..design import identifiability
    from ..library import load_template
    from ..report.templates import template_detail

    t = load_template(name, settings=parse_assignments(setting, "--set") or None, search=templates or ())
    observed, routes, held = split_names(observe), split_names(route), split_names(known)
    check_names(observed, t.observable_names, "--observe", "observables")
    check_names(routes, tuple(t.doses), "--route", "dose routes")
    check_names(held, t.parameter_names, "--known", "parameters")
    if not timeout > 0:
        raise UsageError(f"--timeout {timeout:g}: give a positive number of seconds")
    r = identifiability(t, observed or None, routes=routes if route else None, known=held if known else None,
                        timeout=timeout)
    from ..report.design import identifiability_panel

    console = Console()
    console.print(template_detail(t))
    console.print(identifiability_panel(r))



@app.command("simulate")
def simulate_command(
    name: str = typer.Argument(..., help="Template name or path to a template file."),
    param: list[str] = typer.Option(None, "--param", "-p", metavar="NAME=VALUE",
                                    help="Parameter value (others take the template defaults)."),
    dose: list[str] = typer.Option(None, "--dose", "-d", metavar="SPEC",
                                   help="AMOUNT[@TIME][:ROUTE][/DURATION][xCOUNT/EVERY], e.g. 320:oral or 100x5/12."),
    times: str = typer.Option("0:24:0.5", "--times", "-t", help="Comma list or START:STOP:STEP (template time unit)."),
    out: Path | None = typer.Option(None, "--out", "-o", help="Write a CSV instead of printing a table."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace the --out file if it exists."),
    templates: list[Path] = TEMPLATES_OPT,
    setting: list[str] = typer.Option(None, "--set", metavar="NAME=VALUE", help="Override a template setting."),
) -> None:
    """Simulate a template under a dosing history and print or save the states and observables."""
    import numpy as np

    from ..library import load_template
    from ..model import compiled
    from ..simulate import simulate

    t = load_template(name, settings=parse_assignments(setting, "--set") or None, search=templates or ())
    params = parse_assignments(param, "--param")
    doses = [d for spec in (dose or []) for d in parse_dose(spec)]
    tt = np.array(parse_times(times))
    if out is not None:
        writable_target(out, overwrite)
    with np.errstate(all="ignore"):
        r = simulate(compiled(t), params, doses, tt)
    bad = ~np.isfinite(r.observables)
    if bad.any():
        from ..errors import SimulationError

        i, j = (int(k[0]) for k in np.nonzero(bad))
        raise SimulationError(f"observable {r.observable_names[j]!r} of {t.name!r} is not finite at t = {tt[i]:g} "
                              f"{t.time_unit} with these parameters (a volume of 0?); check the --param values")
    cols = {"time": r.times}
    cols.update({s: r.states[:, i] for i, s in enumerate(r.state_names)})
    cols.update({o: r.observables[:, i] for i, o in enumerate(r.observable_names)})
    if out is not None:
        import pandas as pd

        from ..atomic import atomic_path

        with atomic_path(out) as tmp:
            pd.DataFrame(cols).to_csv(tmp, index=False)
        typer.echo(f"wrote {len(tt)} rows to {out}")
        return
    from rich.console import Console
    from rich.table import Table

    units = {s.name: s.unit for s in t.states} | {o.name: o.unit for o in t.observables}
    table = Table(title=f"{t.name}: simulation", show_lines=False)
    table.add_column(f"time ({t.time_unit})", justify="right")
    for c in list(cols)[1:]:
        table.add_column(f"{c} ({units.get(c, '')})", justify="right")
    for i in range(len(tt)):
        table.add_row(*[f"{cols[c][i]:.6g}" for c in cols])
    Console().print(table)
