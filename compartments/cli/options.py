"""Shared option parsing helpers for the CLI (no numerics here)."""

from __future__ import annotations

import math
from pathlib import Path

from ..dosing import ROUTES, Dose
from ..errors import UsageError

#: Most doses one ``--dose`` may repeat (``xCOUNT/EVERY``).
MAX_REPEAT = 10_000


def parse_assignments(items: list[str] | None, what: str) -> dict[str, float]:
    """``["ka=1.2", "V=30"]`` → ``{"ka": 1.2, "V": 30.0}`` with one-line errors."""
    out: dict[str, float] = {}
    for item in items or []:
        name, sep, value = item.partition("=")
        name = name.strip()
        if not sep or not name or not value.strip():
            raise UsageError(f"{what} {item!r}: write NAME=VALUE, e.g. ka=1.2")
        try:
            v = float(value)
        except ValueError:
            raise UsageError(f"{what} {item!r}: {value!r} is not a number") from None
        if not math.isfinite(v):
            raise UsageError(f"{what} {item!r}: the value must be a finite number")
        out[name] = v
    return out


def split_names(items: list[str] | None) -> list[str]:
    """``["ka,ke", "V"]`` → ``["ka", "ke", "V"]`` (repeatable or comma-separated options)."""
    return [x.strip() for item in items or [] for x in item.split(",") if x.strip()]


def check_names(given: list[str], allowed: tuple[str, ...], option: str, what: str) -> None:
    """One line for a name the template lacks, with the names it has (``what``: plural)."""
    for g in given:
        if g not in allowed:
            raise UsageError(f"{option} {g}: template has no such {what[:-1]}; its {what}: "
                             f"{', '.join(allowed) or 'none'}")


def parse_dose(text: str) -> list[Dose]:
    """Parse ``AMOUNT[@TIME][:ROUTE][/DURATION][xCOUNT/EVERY]``.

    Examples: ``100`` (iv bolus at 0), ``320@0:oral``, ``500@2:infusion/1.5``,
    ``100:oral x5/12`` (five oral doses every 12 h).
    """
    spec = text.replace(" ", "")
    count, every = 1, 0.0
    if "x" in spec:
        spec, _, rep = spec.partition("x")
        c, sep, e = rep.partition("/")
        try:
            count, every = int(c), float(e)
        except ValueError:
            raise UsageError(f"--dose {text!r}: repeat as xCOUNT/EVERY, e.g. x5/12") from None
        if count < 1 or not every > 0 or not sep or not math.isfinite(every):
            raise UsageError(f"--dose {text!r}: repeat needs COUNT ≥ 1 and EVERY > 0 hours")
        if count > MAX_REPEAT:
            raise UsageError(f"--dose {text!r}: at most {MAX_REPEAT} repeated doses in one --dose")
    duration = None
    if "/" in spec:
        spec, _, d = spec.partition("/")
        try:
            duration = float(d)
        except ValueError:
            raise UsageError(f"--dose {text!r}: infusion duration {d!r} is not a number") from None
    route = "infusion" if duration is not None else "iv"
    if ":" in spec:
        spec, _, route = spec.partition(":")
        route = route.lower()
        if route not in ROUTES:
            raise UsageError(f"--dose {text!r}: unknown route {route!r}; use {', '.join(ROUTES)}")
    time = 0.0
    if "@" in spec:
        spec, _, tt = spec.partition("@")
        try:
            time = float(tt)
        except ValueError:
            raise UsageError(f"--dose {text!r}: time {tt!r} is not a number") from None
    try:
        amount = float(spec)
    except ValueError:
        raise UsageError(f"--dose {text!r}: amount {spec!r} is not a number; "
                         "write AMOUNT[@TIME][:ROUTE][/DURATION][xCOUNT/EVERY]") from None
    if not (math.isfinite(amount) and amount >= 0 and math.isfinite(time) and time >= 0):
        raise UsageError(f"--dose {text!r}: amount and time must be finite and ≥ 0")
    return [Dose(time + i * every, amount, route, duration=duration) for i in range(count)]


def parse_times(text: str) -> list[float]:
    """``"0,0.5,1,2"`` or ``"0:24:0.5"`` (start:stop:step, stop included)."""
    text = text.strip()
    try:
        if ":" in text:
            a, b, c = (float(x) for x in text.split(":"))
            if not c > 0 or b < a:
                raise ValueError
            n = int(math.floor((b - a) / c + 1e-9)) + 1
        else:
            vals = [float(x) for x in text.split(",") if x.strip()]
    except (ValueError, OverflowError):
        raise UsageError(f"--times {text!r}: give comma-separated hours (0,1,2) or START:STOP:STEP") from None
    if ":" in text:
        if n > 1_000_000:
            raise UsageError(f"--times {text!r}: more than a million time points; use a larger step")
        if a < 0:
            raise UsageError(f"--times {text!r}: times must be finite and ≥ 0")
        return [a + i * c for i in range(n)]
    if not vals or any((not math.isfinite(v)) or v < 0 for v in vals):
        raise UsageError(f"--times {text!r}: times must be finite and ≥ 0")
    return vals


def can_write_in(folder: Path) -> bool:
    """True when a file can be created in ``folder`` (tried, not guessed).

    ``os.access`` says yes to root on a read-only or special file system (``/proc``), so
    a small file is created and removed instead.
    """
    import os
    import tempfile

    try:
        fd, name = tempfile.mkstemp(prefix=".compartments-probe.", dir=folder)
    except OSError:
        return False
    os.close(fd)
    try:
        os.unlink(name)
    except OSError:
        pass
    return True


def writable_target(path: Path, overwrite: bool = True) -> Path:
    """Check that ``path`` can be written (its folder exists and is writable)."""
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise UsageError(f"{path}: folder {parent} does not exist; create it first")
    if path.is_dir():
        raise UsageError(f"{path} is a folder; give a file name")
    if not can_write_in(parent):
        raise UsageError(f"{path}: folder {parent} is not writable; choose another output path")
    if path.exists() and not overwrite:
        raise UsageError(f"{path} already exists; pass --overwrite or choose another name")
    return path
