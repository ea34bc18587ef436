"""Atomic file output: write to a temporary name in the same folder, then rename.

An interrupted run leaves either the old file or the new one, never half of one.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary path next to ``path``; rename it onto ``path`` on success.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> with atomic_path(d / "a.txt") as tmp:
    ...     _ = tmp.write_text("hello")
    >>> (d / "a.txt").read_text()
    'hello'
    """
    target = Path(path)
    fd, name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent or ".")
    os.close(fd)
    tmp = Path(name)
    # mkstemp creates 0600; give the file the permissions an ordinary open() would
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)
    try:
        yield tmp
        os.replace(tmp, target)
    finally:
        if tmp.exists():
            tmp.unlink()


def write_text(path: str | os.PathLike[str], text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def write_bytes(path: str | os.PathLike[str], data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return Path(path)
