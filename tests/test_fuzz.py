"""Property-based fuzzing of everything that reads text from someone else, and resource limits.

Random text and bytes go into the expression parser, the template parser, the study
reader and the ``inspect`` command. The only acceptable outcomes are a result or a
:class:`~compartments.errors.CompartmentsError` with a one-line message; no other
exception, no code run (``eval``/``exec``/``compile``, ``os``/``subprocess`` imports and
calls are trapped while parsing), and each example within the hypothesis deadline.

The parser's own fuzz test (tests/test_expressions.py) already checks random text for
ExpressionError only; this file adds random *bytes*, hostile token soup with the code
trap, the template and study readers, and resource exhaustion through the command line
with a memory bound (tracemalloc peak), which tests/test_template.py checks only through
the library.
"""

from __future__ import annotations

import builtins
import contextlib
import os
import subprocess
import sys
import time
import tracemalloc
from collections.abc import Iterator
from datetime import timedelta
from pathlib import Path

import pandas as pd
import pytest
import sympy as sp
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from template_texts import oral_template

import compartments
from compartments.cli import main
from compartments.errors import CompartmentsError, ExpressionError, TemplateError
from compartments.expressions import parse_expression
from compartments.study import Study, read_study
from compartments.template import Template, parse_template

HANG_GUARD_S = 5.0  # a hang detector, not a speed test
MEMORY_LIMIT = 64 * 2**20  # bytes of Python allocations while refusing one hostile input

NAMES = {n: sp.Symbol(n, real=True) for n in ("ka", "ke", "V", "depot", "central", "x")}
FORBIDDEN_MODULES = {"os", "subprocess", "posix", "shutil", "pty", "socket", "ctypes", "importlib"}


class CodeRan(AssertionError):
    """Raised by the traps below."""


PROJECT = str(Path(compartments.__file__).parent)
#: Code of sympy that turns *text* into code (``sympify`` of a string); anything the
#: parsers hand to these runs as Python.
SYMPY_TEXT = (str(Path(sp.__file__).parent / "parsing"), str(Path(sp.__file__).parent / "core" / "sympify.py"))


def _risky_caller(depth: int = 2) -> bool:
    """True when the caller ``depth`` frames up is a compartments function or sympy's text parser.

    Module bodies run by a lazy import, and other libraries building classes with
    ``exec`` (dataclasses, namedtuple), are not the program running user text.
    """
    code = sys._getframe(depth).f_code
    if code.co_filename.startswith(PROJECT):
        return code.co_name != "<module>"
    return code.co_filename.startswith(SYMPY_TEXT)


@contextlib.contextmanager
def no_code_runs() -> Iterator[list[str]]:
    """Trap code run from text, imports of os-like modules, and command execution.

    ``eval``/``exec``/``compile`` of *text* called by compartments or by sympy's string
    parser, ``sympy.parsing.sympy_parser.parse_expr``, imports of os-like modules by a
    compartments function, ``os.system``, ``os.popen`` and ``subprocess.Popen`` are
    recorded and raise :class:`CodeRan`.
    """
    import sympy.parsing.sympy_parser as sympy_parser

    calls: list[str] = []
    real_import = builtins.__import__
    saved = {name: getattr(builtins, name) for name in ("eval", "exec", "compile")}
    saved_os = {name: getattr(os, name) for name in ("system", "popen")}
    saved_popen, saved_parse = subprocess.Popen, sympy_parser.parse_expr

    def trap(name: str, passthrough=None):  # noqa: ANN001, ANN202
        def trapped(*args, **kwargs):  # noqa: ANN002, ANN003
            source = args[0] if args else kwargs.get("source")
            if passthrough is not None and not (isinstance(source, (str, bytes)) and _risky_caller()):
                return passthrough(*args, **kwargs)
            calls.append(name)
            raise CodeRan(name)
        return trapped

    def guarded_import(name, globals=None, locals=None, fromlist=(), level=0):  # noqa: ANN001, A002
        if level == 0 and name.split(".")[0] in FORBIDDEN_MODULES and _risky_caller():
            calls.append(f"import {name}")
            raise CodeRan(f"import {name}")
        return real_import(name, globals, locals, fromlist, level)

    builtins.__import__ = guarded_import
    for name, fn in saved.items():
        setattr(builtins, name, trap(name, fn))
    for name in saved_os:
        setattr(os, name, trap(f"os.{name}"))
    subprocess.Popen = trap("subprocess.Popen")  # type: ignore[misc]
    sympy_parser.parse_expr = trap("sympy parse_expr")
    try:
        yield calls
    finally:
        builtins.__import__ = real_import
        for name, fn in saved.items():
            setattr(builtins, name, fn)
        for name, fn in saved_os.items():
            setattr(os, name, fn)
        subprocess.Popen = saved_popen  # type: ignore[misc]
        sympy_parser.parse_expr = saved_parse


def test_the_trap_catches_text_run_as_code() -> None:
    """The trap is live: sympy's string parser and running a command are caught."""
    with no_code_runs() as calls:
        with pytest.raises(CodeRan):
            sp.sympify("x + 1")
        with pytest.raises(CodeRan):
            os.system("true")
        assert sp.sympify(2) == 2  # sympify of a number runs no text
    assert calls == ["sympy parse_expr", "os.system"]


def one_line(exc: BaseException) -> None:
    assert "\n" not in str(exc), str(exc)
    assert str(exc).strip(), type(exc).__name__


# --------------------------------------------------------------------- expressions
HOSTILE_TOKENS = [
    "__import__", "('os')", ".system", "('touch x')", "eval", "exec", "compile", "open", "lambda", ":",
    "[", "]", "{", "}", "'", '"', ".", "__class__", "__subclasses__", "()", "__builtins__", "globals",
    "getattr", "sympify", "x", "ka", "ke", "central", "1", "9", "**", "*", "+", "-", "/", "^", "(", ")",
    ",", "exp", "log", "piecewise", "<", ">=", "1e308", "1e-320", " ", "\n", "\x00", "é", "∞",
]  # fmt: skip


@settings(max_examples=250, deadline=timedelta(seconds=2), suppress_health_check=[HealthCheck.too_slow])
@given(st.one_of(
    st.lists(st.sampled_from(HOSTILE_TOKENS), max_size=30).map("".join),
    st.binary(max_size=120).map(lambda b: b.decode("utf-8", errors="surrogateescape")),
    st.binary(max_size=120).map(lambda b: b.decode("latin-1")),
))
def test_expression_parser_runs_no_code(text: str) -> None:
    """Hostile token soup and decoded random bytes: a sympy expression or ExpressionError, no code run."""
    with no_code_runs() as calls:
        try:
            result = parse_expression(text, NAMES)
        except ExpressionError as exc:
            one_line(exc)
        else:
            assert isinstance(result, sp.Expr)
    assert calls == []


@pytest.mark.parametrize("text", [
    "__import__('os').system('touch x')",
    "().__class__.__base__.__subclasses__()",
    "eval('1')",
    "exec('import os')",
    "globals()['__builtins__']",
    "getattr(x, '__class__')",
    "lambda: 0",
    "[x for x in ()]",
    "x if 1 else 0",
    "sympify('x')",
])  # fmt: skip
def test_known_escapes_refused(text: str) -> None:
    """Well-known ways out of Python sandboxes are refused, and none of them runs."""
    with no_code_runs() as calls, pytest.raises(ExpressionError) as info:
        parse_expression(text, NAMES)
    one_line(info.value)
    assert calls == []


# --------------------------------------------------------------------- templates
TEMPLATE = oral_template("fz", "fuzz base")


def test_template_base_is_valid() -> None:
    """The text the mutations start from is itself a valid template."""
    assert parse_template(TEMPLATE).state_names == ("depot", "central")


@st.composite
def mutated_templates(draw: st.DrawFn) -> str:
    """The base template with a few random edits (insert, delete, replace) at random places."""
    text = TEMPLATE
    for _ in range(draw(st.integers(1, 4))):
        i = draw(st.integers(0, len(text)))
        kind = draw(st.sampled_from(["insert", "delete", "replace"]))
        piece = draw(st.one_of(st.text(max_size=12), st.sampled_from(HOSTILE_TOKENS + ["=", "[x]", "\"\"\"", "#"])))
        if kind == "insert":
            text = text[:i] + piece + text[i:]
        elif kind == "delete":
            text = text[:i] + text[i + draw(st.integers(1, 20)):]
        else:
            text = text[:i] + piece + text[i + len(piece):]
    return text


@settings(max_examples=150, deadline=timedelta(seconds=3), suppress_health_check=[HealthCheck.too_slow])
@given(mutated_templates())
def test_template_parser_never_escapes(text: str) -> None:
    """A damaged template is a Template or a one-line TemplateError; no code runs."""
    with no_code_runs() as calls:
        try:
            result = parse_template(text, path="fz.toml")
        except TemplateError as exc:
            one_line(exc)
            assert str(exc).startswith("fz.toml")
        else:
            assert isinstance(result, Template)
    assert calls == []


# --------------------------------------------------------------------- study files
CELLS = [
    "1", "2", "a", "0", "0.5", "-1", "1e400", "nan", "inf", "", "NA", "<0.1", "<", "BLQ", "oral", "po", "iv",
    "infusion", "rectal", "2024-03-01 08:30", "2024-03-01T08:30:00+02:00", "\"1,5\"", "\"", "x\"y", "1,5",
    "é", "\x00", "   ", "99999999999999999999", "0x10", "1_000", "+3", ".5", "5.",
]  # fmt: skip
HEADERS = [
    "subject", "id", "time", "time (h)", "time (min)", "conc", "conc (mg/L)", "value", "dose", "dose (mg)",
    "route", "lloq", "duration", "rate", "observable", "weight", "", "time", "x",
]  # fmt: skip


@st.composite
def csv_like(draw: st.DrawFn) -> str:
    """Text that looks like a study file: a header of plausible names, rows of odd cells."""
    sep = draw(st.sampled_from([",", ";", "\t", "|", " "]))
    header = draw(st.lists(st.sampled_from(HEADERS), min_size=1, max_size=7))
    n = len(header)
    rows = draw(st.lists(st.lists(st.sampled_from(CELLS), min_size=max(n - 1, 0), max_size=n + 1), max_size=12))
    eol = draw(st.sampled_from(["\n", "\r\n", "\r"]))
    return eol.join([sep.join(header), *(sep.join(r) for r in rows)]) + draw(st.sampled_from(["", eol]))


def _read(path: Path, **options: object) -> None:
    with no_code_runs() as calls:
        try:
            study = read_study(path, **options)
        except CompartmentsError as exc:
            one_line(exc)
        else:
            assert isinstance(study, Study) and len(study) >= 1
    assert calls == []


@settings(max_examples=150, deadline=timedelta(seconds=2),
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=600), suffix=st.sampled_from([".csv", ".tsv", ".txt", ".xlsx", ".parquet"]))
def test_random_bytes_into_read_study(tmp_path: Path, data: bytes, suffix: str) -> None:
    """Random bytes under any supported name: a Study or a one-line CompartmentsError."""
    path = tmp_path / f"fuzz{suffix}"
    path.write_bytes(data)
    _read(path, dose=100.0, route="oral")


@settings(max_examples=200, deadline=timedelta(seconds=2),
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(text=csv_like(), blq=st.sampled_from(["censor", "drop", "half"]), dose=st.booleans())
def test_csv_like_text_into_read_study(tmp_path: Path, text: str, blq: str, dose: bool) -> None:
    """Plausible but broken study files: a Study or a one-line CompartmentsError."""
    path = tmp_path / "fuzz.csv"
    path.write_text(text, encoding="utf-8", errors="surrogateescape", newline="")
    _read(path, blq=blq, **({"dose": 10.0, "route": "iv"} if dose else {}))


@settings(max_examples=60, deadline=timedelta(seconds=2),
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(frame=st.lists(st.tuples(st.sampled_from(CELLS), st.sampled_from(CELLS), st.sampled_from(CELLS)),
                      min_size=1, max_size=8))
def test_csv_like_rows_into_inspect(tmp_path: Path, capfd: pytest.CaptureFixture[str],
                                    frame: list[tuple[str, str, str]]) -> None:
    """Through the command line: exit 0 or 2, never a traceback, one error line when 2."""
    path = tmp_path / "fuzz.csv"
    pd.DataFrame(frame, columns=["subject", "time", "conc"]).to_csv(path, index=False)
    capfd.readouterr()
    try:
        main(["inspect", str(path), "--dose", "10", "--route", "iv"])
        code = 0
    except SystemExit as exc:
        code = int(exc.code or 0)
    out, err = capfd.readouterr()
    assert "Traceback" not in out + err
    assert code in (0, 2)
    if code == 2:
        lines = [ln for ln in err.splitlines() if ln.strip()]
        assert len(lines) == 1 and lines[0].startswith("compartments: error: "), err


# --------------------------------------------------------------------- resources via the CLI
BASE_PATH_ARGS = ["--dose", "100", "--route", "oral", "--strategy", "nls", "--workers", "1", "--quiet"]


def _cli_refuses_quickly(argv: list[object], capfd: pytest.CaptureFixture[str]) -> str:
    """Run ``argv``; it must exit 2 within the hang guard and allocate under the memory bound."""
    capfd.readouterr()
    tracemalloc.start()
    start = time.perf_counter()
    try:
        main([str(a) for a in argv])
        code = 0
    except SystemExit as exc:
        code = int(exc.code or 0)
    finally:
        elapsed = time.perf_counter() - start
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
    _, err = capfd.readouterr()
    assert code == 2, err
    assert elapsed < HANG_GUARD_S, elapsed
    assert peak < MEMORY_LIMIT, f"peak {peak / 2**20:.1f} MiB"
    return err


def _template_with(tmp: Path, equation: str = '"-ka*depot"', replacement: str | None = None,
                   states: int | None = None) -> Path:
    text = TEMPLATE if replacement is None else TEMPLATE.replace(equation, replacement, 1)
    if states is not None:
        text = text.replace('[states.depot]\nunit = "mg"\n',
                            "".join(f'[states.s{i}]\nunit = "mg"\n' for i in range(states)), 1)
    path = tmp / "fz.toml"
    path.write_text(text, encoding="utf-8")
    return path


class TestResourcesThroughTheCommandLine:
    """Resource-exhausting templates given to ``fit --model PATH``: refused fast, in bounded memory."""

    @pytest.fixture
    def data(self, tmp_path: Path, capfd: pytest.CaptureFixture[str]) -> Path:
        path = tmp_path / "study.csv"
        path.write_text("subject,time,conc\n1,0.5,3.1\n1,1,4.6\n1,2,4.2\n1,4,3.0\n", encoding="utf-8")
        # warm up: the first run imports the command modules; that is not the input's cost
        for argv in (["fit", path, "--model", "no-such-model"], ["show", "one-comp-oral"]):
            with contextlib.suppress(SystemExit):
                main([str(a) for a in argv])
        capfd.readouterr()
        return path

    def test_power_tower(self, tmp_path: Path, data: Path, capfd) -> None:
        """9**9**9**9 would have about 3.7e8 digits; it is refused by its exponent."""
        path = _template_with(tmp_path, replacement='"-ka*depot*9**9**9**9"')
        assert "exponent" in _cli_refuses_quickly(["fit", data, "--model", path, *BASE_PATH_ARGS], capfd)

    def test_thousands_of_parentheses(self, tmp_path: Path, data: Path, capfd) -> None:
        """1 900 nested parentheses (inside the length limit) are refused by depth, with no RecursionError."""
        path = _template_with(tmp_path, replacement='"' + "(" * 950 + "ka" + ")" * 950 + '*depot"')
        assert "nested too deeply" in _cli_refuses_quickly(["fit", data, "--model", path, *BASE_PATH_ARGS], capfd)

    def test_fifty_megabytes(self, tmp_path: Path, data: Path, capfd) -> None:
        """A 50 MB template (written for real, not sparse) is refused from its size."""
        path = tmp_path / "big.toml"
        with open(path, "wb") as handle:
            handle.write(b'name = "big"\n' + b"# padding\n" * 5_000_000)
        assert "the limit is 1 MB" in _cli_refuses_quickly(["fit", data, "--model", path, *BASE_PATH_ARGS], capfd)

    def test_fifty_megabytes_in_a_templates_folder(self, tmp_path: Path, data: Path, capfd) -> None:
        """The same file found by name in --templates DIR."""
        folder = tmp_path / "models"
        folder.mkdir()
        with open(folder / "big.toml", "wb") as handle:
            handle.write(b'name = "big"\n')
            handle.truncate(50_000_000)
        err = _cli_refuses_quickly(["fit", data, "--model", "big", "--templates", folder, *BASE_PATH_ARGS], capfd)
        assert "the limit is 1 MB" in err

    def test_thousands_of_states(self, tmp_path: Path, data: Path, capfd) -> None:
        """5 000 states are refused by count before any model is built."""
        path = _template_with(tmp_path, states=5000)
        assert "the limit is 200" in _cli_refuses_quickly(["fit", data, "--model", path, *BASE_PATH_ARGS], capfd)

    def test_thousands_of_states_via_simulate(self, tmp_path: Path, data: Path, capfd) -> None:
        """The same through ``simulate``, which would otherwise integrate them."""
        path = _template_with(tmp_path, states=5000)
        assert "the limit is 200" in _cli_refuses_quickly(["simulate", path], capfd)

    def test_huge_study_cell(self, tmp_path: Path, capfd) -> None:
        """A study file whose one cell is 5 MB long is refused, not parsed into a giant number."""
        path = tmp_path / "study.csv"
        path.write_text("subject,time,conc\n1,0.5," + "9" * 5_000_000 + "\n", encoding="utf-8")
        err = _cli_refuses_quickly(["fit", path, "--model", "one-comp-oral", *BASE_PATH_ARGS], capfd)
        assert "row 2" in err
