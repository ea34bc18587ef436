"""Terminal report of a sampling design and of a structural identifiability answer (rich).

Presentation only: everything shown is read from a
:class:`~compartments.design.sampling.SamplingDesign` or an
:class:`~compartments.design.identifiability.IdentifiabilityResult`; nothing is computed
again here. Tables stay whole on an 80-column terminal.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from rich import box
from rich.console import Group
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from .tables import fmt

__all__ = [
    "DESIGN_CAUTIONS",
    "design_cautions_panel",
    "design_report",
    "identifiability_panel",
]

DESIGN_CAUTIONS = (
    "For research use only.",
    "A sampling plan computed from assumed parameter values, an assumed model and an assumed "
    "residual error: it is only as good as those assumptions. Check them against what is known "
    "(a robust design over a prior helps when they are uncertain).",
    "Expected standard errors are large-sample approximations from the Fisher information; "
    "real studies do worse when samples are missed, late or below the quantification limit.",
    "Not clinical dosing advice. Study protocols, doses and sampling in people or animals belong "
    "to licensed clinicians and investigators under the ethics approvals and regulations that "
    "apply where they work.",
)

_STATUS_WORDS = {
    "global": "yes: one value",
    "local": "locally: {n} values",
    "none": "no",
    "undecided": "undecided",
}


def _table(title: str | None = None) -> Table:
    return Table(title=title, title_justify="left", title_style="bold", box=box.SIMPLE_HEAD,
                 show_edge=False, pad_edge=False, expand=False)


def _times(times: Sequence[float], replicates: Sequence[int]) -> str:
    parts = []
    for t, r in zip(times, replicates, strict=True):
        parts.append(fmt(t, 3) + (f" (×{r})" if r > 1 else ""))
    return ", ".join(parts)


def _header(d: Any) -> Text:
    tu = d.time_unit
    lines = [f"{d.template}: {d.criterion}-optimal sampling, {'population' if d.population else 'one subject'}"]
    doses = "; ".join(f"{x['amount']:g} {x['route']} at {x['time']:g} {tu}"
                      + (f" over {x['duration']:g} {tu}" if x.get("duration") else "") for x in d.doses)
    lines.append(f"doses: {doses or 'none'}")
    lines.append(f"window: {d.window[0]:g} to {d.window[1]:g} {tu}"
                 + (f", samples at least {d.min_spacing:g} {tu} apart" if d.min_spacing else "")
                 + (", allowed times " + ", ".join(f"{a:g}" for a in d.allowed) if d.allowed else ""))
    lines.append(f"observed: {', '.join(d.observed)}; residual error: {_error_text(d)}")
    fixed = [k for k in d.values if k not in d.parameters]
    if fixed:
        lines.append("held known: " + ", ".join(f"{k} = {d.values[k]:g}" for k in fixed))
    if d.prior:
        lines.append("parameter uncertainty (SD of the log): "
                     + ", ".join(f"{k} {fmt(v, 3)}" for k, v in d.prior.items()) + f"; {d.draws} draws")
    return Text("\n".join(lines))


def _error_text(d: Any) -> str:
    e = d.error
    parts = []
    if e.sd:
        parts.append("SD " + ", ".join(f"{fmt(v, 3)} {d.units.get(o, '')}".strip()
                                       for o, v in zip(d.observed, e.sd, strict=True)))
    if e.cv:
        parts.append(("SD of the log " if e.kind == "lognormal" else "CV ")
                     + ", ".join(f"{fmt(100 * v, 3)}%" if e.kind != "lognormal" else fmt(v, 3) for v in e.cv))
    return f"{e.kind} ({'; '.join(parts)})"


def schedule_table(d: Any) -> Table:
    """The sampling times, per group."""
    t = _table()
    if d.population:
        t.add_column("group", justify="right")
        t.add_column("subjects", justify="right")
    t.add_column(f"sampling times ({d.time_unit})", overflow="fold")
    for i, g in enumerate(d.groups):
        row = [_times(g.times, g.replicates)]
        if d.population:
            row = [str(i + 1), str(g.subjects)] + row
        t.add_row(*row)
    return t


def precision_table(d: Any) -> Table:
    """Expected relative standard errors."""
    t = _table("expected precision")
    t.add_column("parameter")
    t.add_column("value", justify="right")
    t.add_column("unit")
    t.add_column("RSE %", justify="right")
    if d.population:
        t.add_column("between-subject SD", justify="right")
        t.add_column("RSE % of its variance", justify="right")
    for k in d.parameters:
        row = [k, fmt(d.values[k]), d.units.get(k, ""), fmt(d.expected_rse[k], 3)]
        if d.population:
            row += [fmt(d.variability[k], 3) if k in d.variability else "—",
                    fmt(d.expected_rse_variance[k], 3) if k in d.expected_rse_variance else "—"]
        t.add_row(*row)
    return t


def error_precision_table(d: Any) -> Table:
    """Population designs: expected precision of the residual error parameters."""
    t = _table("residual error")
    t.add_column("parameter")
    t.add_column("value", justify="right")
    t.add_column("RSE %", justify="right")
    values = d.error.parameter_values()
    for (k, v), value in zip(d.expected_rse_error.items(), values, strict=True):
        t.add_row(k, fmt(value, 3), fmt(v, 3))
    return t


def equivalence_text(d: Any) -> Text:
    """What the equivalence theorem says about the design, in words."""
    c = d.equivalence
    where = ", ".join(fmt(a, 3) for a in c.at)
    head = (f"Equivalence theorem (Kiefer–Wolfowitz): the sensitivity function reaches {fmt(c.maximum, 4)}"
            f" (bound {fmt(c.bound, 4)}) at {where} {d.time_unit}: ")
    if c.holds:
        body = "the design is optimal among all designs, whatever their weights."
    else:
        body = (f"a design with other weights or more distinct times could do better; this one is at least "
                f"{fmt(100 * c.efficiency_bound, 3)}% as efficient")
        if c.free_weights is not None:
            body += f" ({fmt(100 * c.free_weights, 3)}% of the best design with free weights on the grid)"
        body += "."
    search = d.search
    tail = f"\nSearch: {search['method']}; {search['agreeing']} of {search['starts']} starts reached the best value."
    return Text(head + body + tail)


def compare_table(rows: Sequence[tuple[str, float]], time_unit: str) -> Table:
    """Efficiency of other schedules relative to the design (computed by the caller)."""
    t = _table("compared schedules")
    t.add_column(f"times ({time_unit})")
    t.add_column("efficiency %", justify="right")
    for label, eff in rows:
        t.add_row(label, fmt(100 * eff, 3))
    return t


def design_cautions_panel() -> Panel:
    """The closing cautions of a design report."""
    text = Text()
    for i, line in enumerate(DESIGN_CAUTIONS):
        text.append(("" if i == 0 else "\n") + "• " + line)
    return Panel(text, title="Read before use", title_align="left", border_style="yellow", box=box.ROUNDED)


def design_report(d: Any, compared: Sequence[tuple[str, float]] = ()) -> Group:
    """The whole design report: settings, times, expected precision, the equivalence-theorem
    check, compared schedules, notes and the cautions."""
    parts: list[Any] = [Panel(_header(d), title="compartments design", title_align="left", box=box.ROUNDED),
                        schedule_table(d), precision_table(d)]
    if d.population and d.expected_rse_error:
        parts.append(error_precision_table(d))
    parts.append(equivalence_text(d))
    if compared:
        parts.append(compare_table(compared, d.time_unit))
        parts.append(Text("Efficiency relative to the design above (same subjects and assumptions); above 100% "
                          "the compared schedule carries more information.", style="dim"))
    for note in d.notes:
        parts.append(Text(f"Note: {note}.", style="dim"))
    parts.append(design_cautions_panel())
    return Group(*parts)


def identifiability_panel(r: Any) -> Panel:
    """A structural identifiability answer: status per parameter, combinations, solutions."""
    t = _table()
    t.add_column("parameter")
    t.add_column("structurally")
    t.add_column("why", overflow="fold")
    for k, v in r.status.items():
        words = _STATUS_WORDS.get(v, v).format(n=r.solutions if r.solutions else "several")
        t.add_row(k, words, "" if v == "local" else r.why.get(k, ""))
    lines = []
    if r.combinations:
        lines.append("identifiable combinations: " + ", ".join(str(c) for c in r.combinations))
    if r.solutions is not None and r.solutions > 1:
        lines.append(f"{r.solutions} parameter sets give the same output at the checked point"
                     f" ({r.admissible} of them real with the allowed signs)")
    for note in r.notes:
        lines.append(note)
    routes = ", ".join(r.routes) if r.routes else "none"
    known = ", ".join(r.known) if r.known else "none"
    occasions = " (each a separate occasion)" if len(r.routes) > 1 else ""
    lines.append(f"observed: {', '.join(r.observed)}; doses: {routes}{occasions}; known: {known}")
    lines.append(f"method: {r.method}; {r.seconds:.1f} s")
    body = Group(t, Text("\n".join(lines), style="dim"))
    return Panel(body, title="structural identifiability (no data; any parameter values but a rare few)",
                 title_align="left", box=box.ROUNDED, expand=False)
