"""Shared by the command-line tests: run the program in-process and return its exit code."""

from __future__ import annotations

from compartments.cli import main


def run(argv: list[object]) -> int:
    """Run ``compartments`` with ``argv``; its exit code (0 when it returns normally)."""
    try:
        main([str(a) for a in argv])
    except SystemExit as exc:
        return int(exc.code or 0)
    return 0
