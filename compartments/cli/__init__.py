"""The ``compartments`` command-line program (thin: parse, call the library, render).

Each command group lives in its own module and registers itself on :data:`app`.
Errors a user can cause end as one line on stderr and exit code 2; an interrupted run
exits 130.
"""

from __future__ import annotations

import sys

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

    for mod in ("fit_cmd", "cohort_cmd", "design_cmd"):
        try:
            __import__(f"{__name__}.{mod}")
        except ModuleNotFoundError as exc:  # a command module not present in this build
            if exc.name != f"{__name__}.{mod}":
                raise


def fail(message: str) -> None:
    """Print one error line and exit with code 2."""
    typer.echo(f"compartments: error: {message}", err=True)
    sys.exit(2)


# typer >= 0.2x carries its own copy of click: its parse errors are not ``click``'s
# classes. Take the classes from typer itself so either layout is caught.
_EXIT = (typer.Exit,)
_ABORT = (typer.Abort,)
_PARSE = tuple(c for c in typer.BadParameter.__mro__ if c.__name__ == "ClickException") or (typer.BadParameter,)


def _usage_line(exc: Exception) -> str:
    """A parse error as one line, with where to look for help."""
    ctx = getattr(exc, "ctx", None)
    name = getattr(ctx, "info_name", None)
    where = f" (see 'compartments {name} --help')" if name and name != "compartments" else " (see 'compartments --help')"
    fmt = getattr(exc, "format_message", None)
    text = fmt() if callable(fmt) else str(exc)
    return " ".join(str(text).split()) + where


def main(argv: list[str] | None = None) -> None:
    """Entry point: run the app, turning user errors into one line and exit code 2."""
    _register()
    try:
        rc = app(args=argv, standalone_mode=False, prog_name="compartments")
        if rc == 130:  # typer turns Ctrl-C into exit code 130 without a word
            typer.echo("compartments: interrupted", err=True)
        if isinstance(rc, int) and rc:
            sys.exit(rc)
    except _EXIT as exc:
        sys.exit(getattr(exc, "exit_code", 0))
    except _ABORT:
        typer.echo("compartments: interrupted", err=True)
        sys.exit(130)
    except _PARSE as exc:
        fail(_usage_line(exc))
    except CompartmentsError as exc:
        fail(str(exc).replace("\r", " ").replace("\n", " "))
    except KeyboardInterrupt:
        typer.echo("compartments: interrupted", err=True)
        sys.exit(130)
    except OSError as exc:
        fail(f"{getattr(exc, 'filename', '') or ''}: {exc.strerror or exc}".lstrip(": "))
