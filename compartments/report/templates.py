"""Rich renderables describing templates (``compartments templates`` / ``show``)."""

from __future__ import annotations

from collections.abc import Sequence

from rich.console import Group
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from ..template import Template


def _params(t: Template) -> str:
    return ", ".join(f"{p.name} ({p.unit})" + (" [fixed]" if p.fixed else "") for p in t.parameters)


def template_list(templates: Sequence[Template]) -> Table:
    """One row per template: name, kind, description, parameters with units."""
    table = Table(title="Model templates", expand=False, show_lines=False)
    table.add_column("name", style="bold", no_wrap=True)
    table.add_column("kind")
    table.add_column("description")
    table.add_column("parameters (unit)")
    for t in templates:
        table.add_row(t.name, t.kind, t.description, _params(t))
    return table


def template_detail(t: Template) -> Group:
    """Equations, parameters, dose inputs, observables and derived quantities of a template."""
    head = Text(f"{t.name} — {t.description}", style="bold")
    parts: list = [head]
    if t.note:
        parts.append(Text(t.note.strip()))
    if t.settings:
        parts.append(Text("settings: " + ", ".join(f"{k} = {v:g}" for k, v in t.settings.items())))
    eq = Table(title=f"equations (time in {t.time_unit})", show_header=True)
    eq.add_column("state")
    eq.add_column("unit")
    eq.add_column("d/dt")
    eq.add_column("initial")
    for s in t.states:
        eq.add_row(s.name, s.unit, str(t.equations[s.name]), str(s.initial))
    parts.append(eq)
    pt = Table(title="parameters")
    for c in ("name", "unit", "default", "lower", "upper", "scale", "description"):
        pt.add_column(c, justify="right" if c in ("default", "lower", "upper") else "left")
    for p in t.parameters:
        pt.add_row(p.name, p.unit, f"{p.default:g}", f"{p.lower:g}", f"{p.upper:g}",
                   ("log" if p.log else "linear") + (", fixed" if p.fixed else ""), p.description)
    parts.append(pt)
    if t.doses:
        dt = Table(title="dose inputs")
        for c in ("route", "enters", "bioavailability", "lag"):
            dt.add_column(c)
        for route, d in t.doses.items():
            dt.add_row(route, d.state, str(d.bioavailability), d.lag or "—")
        parts.append(dt)
    ot = Table(title="observables")
    for c in ("name", "expression", "unit"):
        ot.add_column(c)
    for o in t.observables:
        ot.add_row(o.name, str(o.expression), o.unit)
    parts.append(ot)
    if t.derived:
        de = Table(title="derived quantities")
        for c in ("name", "expression", "unit", "description"):
            de.add_column(c)
        for d in t.derived:
            de.add_row(d.name, str(d.expression), d.unit, d.description)
        parts.append(de)
    return Group(Panel(Group(*parts), title=t.name, expand=False))
