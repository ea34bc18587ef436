"""Finding, reading and listing template files.

Templates are searched, in order, in the folders given by the caller (the command line's
``--templates DIR``), the folders in the environment variable ``COMPARTMENTS_TEMPLATES``
(separated by ``os.pathsep``) and the folder shipped with the package. The first file
``<folder>/<name>.toml`` found wins, so a user template shadows a shipped one of the same
name. The file format is described in :mod:`compartments.template`.
"""

from __future__ import annotations

import difflib
import os
import re
import warnings
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path

from .errors import TemplateError
from .template import MAX_TEMPLATE_BYTES, Template, parse_template

__all__ = [
    "ENV_VAR",
    "list_templates",
    "load_template",
    "parse_template",
    "read_template",
    "scan_templates",
    "shipped_dir",
    "template_dirs",
]

#: Environment variable naming extra template folders (``os.pathsep``-separated).
ENV_VAR = "COMPARTMENTS_TEMPLATES"

_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_-]{0,63}", re.ASCII)
_HOW_TO_LIST = "`compartments templates` (or list_templates() in Python) shows the available names"


def shipped_dir() -> Path:
    """The folder of templates shipped with the package.

    Returns
    -------
    pathlib.Path

    Examples
    --------
    >>> (shipped_dir() / "one-comp-oral.toml").is_file()
    True
    """
    try:
        from importlib.resources import files

        found = files("compartments.templates")
        candidate = Path(str(found))
        if candidate.is_dir():
            return candidate
    except (ImportError, ModuleNotFoundError, TypeError, ValueError):  # pragma: no cover
        pass
    return Path(__file__).resolve().parent.parent / "templates"  # pragma: no cover


def template_dirs(extra: Sequence[str | os.PathLike[str]] = ()) -> list[Path]:
    """Folders searched for templates, in order.

    Parameters
    ----------
    extra : sequence of path-like, optional
        User folders, searched first (e.g. from ``--templates DIR``).

    Returns
    -------
    list of pathlib.Path
        ``extra``, then the existing folders of ``COMPARTMENTS_TEMPLATES``, then the
        shipped folder; each folder once.

    Raises
    ------
    TemplateError
        If a folder in ``extra`` does not exist. (Missing folders named in the
        environment variable are skipped.)

    Examples
    --------
    >>> template_dirs()[-1] == shipped_dir()
    True
    """
    if isinstance(extra, (str, os.PathLike)):
        extra = [extra]
    folders: list[Path] = []
    for item in extra:
        folder = Path(item).expanduser()
        if not folder.is_dir():
            raise TemplateError(
                "template folder does not exist or is not a folder; check the path",
                path=str(folder),
            )
        folders.append(folder)
    for item in os.environ.get(ENV_VAR, "").split(os.pathsep):
        if item.strip():
            folder = Path(item.strip()).expanduser()
            if folder.is_dir():
                folders.append(folder)
    folders.append(shipped_dir())
    unique: list[Path] = []
    seen: set[Path] = set()
    for folder in folders:
        key = folder.resolve()
        if key not in seen:
            seen.add(key)
            unique.append(folder)
    return unique


def read_template(
    path: str | os.PathLike[str], settings: Mapping[str, float] | None = None
) -> Template:
    """Read and validate one template file.

    The size is checked before the file is read; at most :data:`MAX_TEMPLATE_BYTES`
    bytes are ever read. The template's ``name`` must equal the file stem.

    Parameters
    ----------
    path : path-like
        A ``.toml`` file.
    settings : mapping of str to float, optional
        Overrides for the template's settings.

    Returns
    -------
    Template

    Raises
    ------
    TemplateError
        If the file is missing, too large, not UTF-8 or not a valid template.

    Examples
    --------
    >>> read_template(shipped_dir() / "sir.toml").state_names
    ('S', 'I', 'R')
    """
    file = Path(path)
    shown = str(file)
    try:
        if not file.is_file():
            raise TemplateError("template file not found (or not a regular file)", path=shown)
        size = file.stat().st_size
        if size > MAX_TEMPLATE_BYTES:
            raise TemplateError(
                f"template file is {size / 1e6:.1f} MB; the limit is"
                f" {MAX_TEMPLATE_BYTES // 1_000_000} MB - check that this is the right file",
                path=shown,
            )
        with open(file, "rb") as handle:
            data = handle.read(MAX_TEMPLATE_BYTES + 1)
    except OSError as exc:
        raise TemplateError(f"cannot read the template file ({exc.strerror})", path=shown) from None
    if len(data) > MAX_TEMPLATE_BYTES:
        raise TemplateError(
            f"template file is larger than {MAX_TEMPLATE_BYTES // 1_000_000} MB", path=shown
        )
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise TemplateError(
            "template file is not UTF-8 text; save it as UTF-8", path=shown, where=f"line {line}"
        ) from None
    template = parse_template(text, path=shown, settings=settings)
    if template.name != file.stem:
        raise TemplateError(
            f"template name {template.name!r} differs from the file name {file.stem!r};"
            " rename one of them so they match",
            path=shown,
            where="name",
        )
    return template


def _looks_like_path(name: str | os.PathLike[str]) -> bool:
    if isinstance(name, os.PathLike):
        return True
    return (
        name.endswith(".toml")
        or "/" in name
        or os.sep in name
        or (os.altsep is not None and os.altsep in name)
    )


def _files(folders: Iterable[Path]) -> list[Path]:
    found: list[Path] = []
    for folder in folders:
        try:
            found.extend(sorted(p for p in folder.glob("*.toml") if p.is_file()))
        except OSError:  # pragma: no cover - unreadable folder
            continue
    return found


def load_template(
    name_or_path: str | os.PathLike[str],
    *,
    settings: Mapping[str, float] | None = None,
    search: Sequence[str | os.PathLike[str]] = (),
) -> Template:
    """Load a template by name or from a file.

    Parameters
    ----------
    name_or_path : str or path-like
        A template name (``"one-comp-oral"``), searched in :func:`template_dirs`, or a
        path to a ``.toml`` file.
    settings : mapping of str to float, optional
        Overrides for the template's settings, e.g. ``{"n_transit": 5}``.
    search : sequence of path-like, optional
        User folders searched before the environment variable and the shipped folder.

    Returns
    -------
    Template

    Raises
    ------
    TemplateError
        If no template has that name (the message lists close matches) or the file is
        not a valid template.

    Examples
    --------
    >>> load_template("transit-oral", settings={"n_transit": 5}).state_names
    ('depot', 'transit1', 'transit2', 'transit3', 'transit4', 'transit5', 'central')
    """
    if _looks_like_path(name_or_path):
        return read_template(name_or_path, settings=settings)
    name = str(name_or_path)
    folders = template_dirs(search)
    if _NAME.fullmatch(name):
        for folder in folders:
            candidate = folder / f"{name}.toml"
            if candidate.is_file():
                return read_template(candidate, settings=settings)
    known = sorted({p.stem for p in _files(folders)})
    close = difflib.get_close_matches(name, known, n=3, cutoff=0.6)
    hint = f"did you mean {', '.join(repr(c) for c in close)}? " if close else ""
    raise TemplateError(
        f"unknown template {name!r}; {hint}{_HOW_TO_LIST}"
        f" ({len(known)} found in {len(folders)} folder{'s' if len(folders) != 1 else ''})"
    )


def scan_templates(
    search: Sequence[str | os.PathLike[str]] = (),
) -> tuple[list[Template], list[TemplateError]]:
    """Read every template found, keeping going past broken files.

    Parameters
    ----------
    search : sequence of path-like, optional
        User folders searched first.

    Returns
    -------
    templates : list of Template
        One per name, the first found (user folders first).
    errors : list of TemplateError
        One per file that could not be read; a broken file still takes its name, so a
        shipped template of the same name is not listed in its place.

    Examples
    --------
    >>> templates, errors = scan_templates()
    >>> errors
    []
    """
    templates: list[Template] = []
    errors: list[TemplateError] = []
    seen: set[str] = set()
    for file in _files(template_dirs(search)):
        if file.stem in seen:
            continue
        seen.add(file.stem)
        try:
            templates.append(read_template(file))
        except TemplateError as exc:
            errors.append(exc)
    return templates, errors


def list_templates(search: Sequence[str | os.PathLike[str]] = ()) -> list[Template]:
    """All templates found, user folders first; broken files are skipped with a warning.

    Parameters
    ----------
    search : sequence of path-like, optional
        User folders searched first.

    Returns
    -------
    list of Template

    Warns
    -----
    UserWarning
        For each file that could not be read (use :func:`scan_templates` to get the
        errors as values).

    Examples
    --------
    >>> "one-comp-oral" in [t.name for t in list_templates()]
    True
    """
    templates, errors = scan_templates(search)
    for error in errors:
        warnings.warn(f"skipped template: {error}", UserWarning, stacklevel=2)
    return templates
