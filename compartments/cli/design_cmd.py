"""``compartments design``: optimal sampling times before a study."""

from __future__ import annotations

from pathlib import Path

import typer

from ..errors import UsageError
from . import app
from .options import check_names, parse_assignments, parse_dose, parse_times, split_names

TEMPLATES_OPT = typer.Option(None, "--templates", metavar="DIR",
                             help="Folder with user template files (repeatable; also $COMPARTMENTS_TEMPLATES).")


def _comma_assignments(items: list[str] | None, option: str) -> dict[str, float]:
    """``["ka=0.3,ke=0.2", "V=0.1"]`` → a mapping."""
    return parse_assignments([x for item in items or [] for x in item.split(",") if x.strip()], option)


def _window(text: str) -> tuple[float, float]:
    start, sep, end = text.partition(":")
    try:
        if not sep:
            raise ValueError
        return float(start), float(end)
    except ValueError:
        raise UsageError(f"--window {text!r}: write START:END in the template's time unit, e.g. 0:24") from None


def _group(text: str) -> tuple[int, int]:
    subjects, sep, samples = text.partition(":")
    try:
        if not sep:
            raise ValueError
        return int(subjects), int(samples)
    except ValueError:
        raise UsageError(f"--group {text!r}: write SUBJECTS:SAMPLES, e.g. 30:3") from None


def _times(text: str, option: str) -> list[float]:
    try:
        return parse_times(text)
    except UsageError:
        raise UsageError(f"{option} {text!r}: give comma-separated times (0.5,2,8) or START:STOP:STEP, "
                         "finite and ≥ 0") from None


def _compare(text: str) -> list[list[float]]:
    """``0.5,2,8`` (one group) or ``0.5,2;4,8`` (one list per group)."""
    parts = text.split(";")
    if len(parts) == 1:
        return [_times(text.replace(" ", ""), "--compare")]
    return [_times(part.replace(" ", ""), f"--compare {text!r}: group") for part in parts]


@app.command("design")
def design_command(
    name: str = typer.Argument(..., help="Template name or path to a template file."),
    param: list[str] = typer.Option(None, "--param", "-p", metavar="NAME=VALUE",
                                    help="Assumed parameter value (others take the template defaults)."),
    fix: list[str] = typer.Option(None, "--fix", metavar="NAME=VALUE", help="Hold a parameter known at a value."),
    estimate: list[str] = typer.Option(None, "--estimate", metavar="NAME",
                                       help="Also estimate a parameter the template holds fixed (e.g. tlag)."),
    dose: list[str] = typer.Option(None, "--dose", "-d", metavar="SPEC",
                                   help="AMOUNT[@TIME][:ROUTE][/DURATION][xCOUNT/EVERY]; default one dose of 1."),
    samples: int = typer.Option(None, "--samples", "-n", help="Samples per subject."),
    window: str = typer.Option("0:24", "--window", help="START:END of sampling (template time unit)."),
    error: str = typer.Option("additive", "--error", help="additive, proportional, combined or lognormal."),
    sd: float = typer.Option(None, "--sd", help="Additive residual SD (default 10% of the largest prediction)."),
    cv: float = typer.Option(None, "--cv", help="Proportional residual CV as a fraction (default 0.1)."),
    observe: list[str] = typer.Option(None, "--observe", metavar="NAME", help="Observables measured (default all)."),
    criterion: str = typer.Option("D", "--criterion", help="D, A (relative SEs) or Ds (with --interest)."),
    interest: list[str] = typer.Option(None, "--interest", metavar="NAME", help="Parameters that matter, for Ds."),
    spacing: float = typer.Option(0.0, "--spacing", help="Least time between two samples of a subject."),
    allowed: str = typer.Option(None, "--allowed", help="Only these times: comma list or START:STOP:STEP."),
    replicates: int = typer.Option(1, "--replicates", help="Measurements at each sample time."),
    subjects: int = typer.Option(None, "--subjects", help="A population design for this many subjects."),
    variability: list[str] = typer.Option(None, "--variability", metavar="NAME=SD,...",
                                          help="Between-subject SD of the log of a parameter (about its CV)."),
    group: list[str] = typer.Option(None, "--group", metavar="SUBJECTS:SAMPLES",
                                    help="A group with its own times (repeatable)."),
    prior: list[str] = typer.Option(None, "--prior", metavar="NAME=SD,...",
                                    help="Parameter uncertainty (SD of the log): a robust design."),
    draws: int = typer.Option(30, "--draws", help="Draws from the --prior."),
    starts: int = typer.Option(8, "--starts", help="Local starts besides the global search."),
    seed: int = typer.Option(0, "--seed", help="Seed of the search and the draws."),
    compare: list[str] = typer.Option(None, "--compare", metavar="TIMES",
                                      help="Efficiency of another schedule, e.g. 0.5,2,8 (groups: 1,4;2,8)."),
    json_out: Path = typer.Option(None, "--json", metavar="FILE", help="Write the design as JSON."),
    plot: Path = typer.Option(None, "--plot", metavar="FILE.png", help="Draw the curve and the sensitivity function."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace output files."),
    templates: list[Path] = TEMPLATES_OPT,
    setting: list[str] = typer.Option(None, "--set", metavar="NAME=VALUE", help="Override a template setting."),
) -> None:
    """Optimal sampling times (D-, A- or Ds-optimal) for one subject or a population.

    Prints the times, the expected relative standard errors, the equivalence-theorem check
    and the efficiency of compared schedules; writes JSON and a figure on request. For
    research use: a plan from assumed values, not dosing advice.
    """
    from rich.console import Console

    from ..library import load_template
    from .data_cmd import check_target

    if plot is not None and plot.suffix.lower() != ".png":
        raise UsageError(f"--plot {plot}: the figure is written as PNG; give a name ending in .png")
    check_target(json_out, overwrite, "--json")
    check_target(plot, overwrite, "--plot")
    t = load_template(name, settings=parse_assignments(setting, "--set") or None, search=templates or ())
    doses = [d for spec in (dose or []) for d in parse_dose(spec)] or None
    groups = [_group(g) for g in group] if group else None
    if samples is None and groups is None:
        raise UsageError("give --samples N (samples per subject) or --group SUBJECTS:SAMPLES")
    if variability and subjects is None and groups is None:
        raise UsageError("--variability needs --subjects (or --group): it describes a population design")
    check_names(split_names(observe), t.observable_names, "--observe", "observables")
    check_names(split_names(interest), t.parameter_names, "--interest", "parameters")
    check_names(split_names(estimate), t.parameter_names, "--estimate", "parameters")
    compare_blocks = [(text, _compare(text)) for text in compare or []]
    try:
        d = _design(t, param, fix, estimate, doses, samples, window, error, sd, cv, observe, criterion, interest,
                    spacing, allowed, replicates, subjects, variability, groups, prior, draws, starts, seed)
    except UsageError as exc:
        raise UsageError(in_cli_words(str(exc))) from None
    compared = []
    for text, blocks in compare_blocks:
        try:
            eff = d.efficiency(blocks[0] if len(blocks) == 1 else blocks)
        except UsageError as exc:
            raise UsageError(f"--compare {text!r}: {exc}") from None
        compared.append((text, eff))
    from ..report.design import design_report

    Console().print(design_report(d, compared))
    if json_out is not None:
        from .. import __version__
        from ..report.export import write_json

        write_json({"document": "compartments sampling design", "version": __version__, "design": d.to_dict(), "compared": [{"times": c, "efficiency": e} for c, e in compared],
                    "cautions": list(_cautions())}, json_out)
        typer.echo(f"wrote {json_out}")
    if plot is not None:
        from ..report.design_plots import design_figure
        from ..report.plots import save_figure

        save_figure(design_figure(d), plot)
        typer.echo(f"wrote {plot}")


#: Keyword arguments of design_samples() and the options that set them.
_OPTIONS = {"values": "--param", "fixed": "--fix", "estimate": "--estimate", "n": "--samples",
            "window": "--window", "error": "--error", "sd": "--sd", "cv": "--cv", "observed": "--observe",
            "criterion": "--criterion", "interest": "--interest", "min_spacing": "--spacing",
            "allowed": "--allowed", "replicates": "--replicates", "subjects": "--subjects",
            "variability": "--variability", "groups": "--group", "prior": "--prior", "draws": "--draws"}


def in_cli_words(message: str) -> str:
    """A library message with keyword names (``n=0``, ``values={'CL': ...}``) in option words.

    >>> in_cli_words("n=0 must be a finite number > 0")
    '--samples 0 must be a finite number > 0'
    """
    import re

    names = "|".join(_OPTIONS)
    text = re.sub(r"\b(" + names + r")=\{'([^']*)': \.\.\.\}", lambda m: f"{_OPTIONS[m.group(1)]} {m.group(2)}",
                  message)
    text = re.sub(r"\b(" + names + r")=(?=[^\s),;=])", lambda m: _OPTIONS[m.group(1)] + " ", text)
    text = re.sub(r"\b(" + names + r")=", lambda m: _OPTIONS[m.group(1)], text)
    return re.sub(r"\b(" + names + r")\[", lambda m: _OPTIONS[m.group(1)] + " [", text)


def _design(t, param, fix, estimate, doses, samples, window, error, sd, cv, observe, criterion, interest,  # noqa: ANN001
            spacing, allowed, replicates, subjects, variability, groups, prior, draws, starts, seed):
    from ..design import design_samples

    return design_samples(
        t, parse_assignments(param, "--param"), fixed=parse_assignments(fix, "--fix"),
        estimate=split_names(estimate) or None, doses=doses, n=samples, window=_window(window), error=error, sd=sd, cv=cv,
        observed=split_names(observe) or None, criterion=criterion, interest=split_names(interest) or None,
        min_spacing=spacing, allowed=_times(allowed, "--allowed") if allowed else None, replicates=replicates,
        subjects=subjects, variability=_comma_assignments(variability, "--variability") or None, groups=groups,
        prior=_comma_assignments(prior, "--prior") or None, draws=draws, starts=starts, seed=seed,
    )


def _cautions() -> tuple[str, ...]:
    from ..report.design import DESIGN_CAUTIONS

    return DESIGN_CAUTIONS
