"""The ``compartments`` command-line program (thin: parse, call the library, render).

Each command group lives in its own module and registers itself on :data:`app`.
Errors a user can cause end as one line on stderr and exit code 2; an interrupted run
exits 130.
"""

from __future__ import annotations

import sys

import click
import typer

from .. import __version__
from ..errors import CompartmentsError

app = typer.Typer(
    name="compartments",
    help=(
        "Compartmental-model identification from sparse, irregular samples.\n\n"
        "Research use only: results are not clinical dosing advice."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
    context_settings={"help_option_names": ["-h", "--help"]},
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"compartments {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                 help="Show the version and exit."),
) -> None:
    """Compartmental-model identification from sparse, irregular samples."""


def _register() -> None:
    from . import data_cmd, templates_cmd  # noqa: F401

    for mod in ("fit_cmd", "cohort_cmd"):
        try:
            __import__(f"{__name__}.{mod}")
        except ModuleNotFoundError as exc:  # a command module not present in this build
            if exc.name != f"{__name__}.{mod}":
                raise


def fail(message: str) -> None:
    """Print one error line and exit with code 2."""
    click.echo(f"compartments: error: {message}", err=True)
    sys.exit(2)


def main(argv: list[str] | None = None) -> None:
    """Entry point: run the app, turning user errors into one line and exit code 2."""
    _register()
    try:
        rc = app(args=argv, standalone_mode=False, prog_name="compartments")
        if isinstance(rc, int) and rc:
            sys.exit(rc)
    except click.exceptions.Exit as exc:
        sys.exit(exc.exit_code)
    except click.exceptions.Abort:
        click.echo("compartments: interrupted", err=True)
        sys.exit(130)
    except click.ClickException as exc:
        where = f" (see 'compartments {exc.ctx.info_name} --help')" if getattr(exc, "ctx", None) and exc.ctx.info_name != "compartments" else " (see 'compartments --help')"
        fail(exc.format_message().replace("\n", " ") + where)
    except CompartmentsError as exc:
        fail(str(exc).replace("\n", " "))
    except KeyboardInterrupt:
        click.echo("compartments: interrupted", err=True)
        sys.exit(130)
    except OSError as exc:
        fail(f"{getattr(exc, 'filename', '') or ''}: {exc.strerror or exc}".lstrip(": "))
