"""Bad input, through the real command line (``compartments.cli.main``).

Every case runs the program as a user would, with every output option it takes pointed
into the test's folder, and checks the rule for errors a user can cause (the project's
rule, see compartments/errors.py and the README section "When things go wrong"):

* exit code 2;
* exactly one line on stderr, ``compartments: error: ...``, naming what is wrong and
  where (the file, row or column, the template file and line, or the option);
* no traceback anywhere, on stdout or stderr;
* no warning that would reach the terminal (Python shows UserWarning and
  RuntimeWarning by default);
* nothing written: the folder holds exactly what it held before, byte for byte.

Cases that are *not* errors (a subject with too few observations for one model is
refused for that model while the others are fitted, and so on) are in
:class:`TestNotAnError`, each with the reason in a comment.

Where a case needs a folder the program cannot write to: as an ordinary user a folder
with mode 0555; as root (who may write anywhere ``chmod`` allows nothing to stop) the
``/proc`` file system, where no file can be created.
"""

from __future__ import annotations

import hashlib
import json
import os
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pytest
from template_texts import oral_template

from compartments.cli import main
from compartments.cli.data_cmd import MARKER

# Two subjects sampled after an oral dose: concentrations of a one-compartment oral model
# (values invented for these tests, rounded).
GOOD = (
    "subject,time,conc\n"
    "1,0.5,3.1\n1,1,4.6\n1,2,4.2\n1,4,3.0\n1,8,1.6\n1,12,0.8\n"
    "2,0.5,2.2\n2,1,3.9\n2,2,4.4\n2,4,3.4\n2,8,2.0\n2,12,1.1\n"
)
DOSE = ["--dose", "100", "--route", "oral"]
FAST = ["--strategy", "nls", "--workers", "1", "--quiet"]
#: Warnings a user never sees on the terminal by default (Python's default filters).
HIDDEN = (DeprecationWarning, PendingDeprecationWarning)


def run(argv: list[object]) -> tuple[int, list[warnings.WarningMessage]]:
    """Run the program; return its exit code and the warnings it raised."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            main([str(a) for a in argv])
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
        else:
            code = 0
    return code, [w for w in caught if not issubclass(w.category, HIDDEN)]


def snapshot(root: Path) -> dict[str, str]:
    """Every file and folder under ``root`` with a digest of its bytes."""
    out: dict[str, str] = {}
    for p in sorted(root.rglob("*")):
        rel = str(p.relative_to(root))
        out[rel] = "<dir>" if p.is_dir() else hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def write(folder: Path, name: str, content: str | bytes) -> Path:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(content, bytes):
        path.write_bytes(content)
    else:
        path.write_text(content, encoding="utf-8")
    return path


def unwritable(tmp: Path) -> Path:
    """A folder in which no file can be created (see the module docstring)."""
    if os.geteuid() != 0:
        locked = tmp / "locked"
        locked.mkdir(exist_ok=True)
        locked.chmod(0o555)
        return locked
    proc = Path("/proc")
    if not proc.is_dir():
        pytest.skip("running as root without /proc: no folder is unwritable")
    return proc


@dataclass(frozen=True)
class Case:
    """One bad input: ``make(folder)`` writes the inputs and returns (argv, where).

    ``where`` must appear in the error line (a file path, row, column or option);
    ``words`` too. ``outputs``: add --json/--out/--report into the folder, so that any
    file written by mistake is caught.
    """

    id: str
    make: Callable[[Path], tuple[list[object], str]]
    words: tuple[str, ...]
    outputs: bool = True


def data_case(id: str, content: str | bytes, *words: str, name: str = "study.csv", extra: tuple = (),
              model: str = "one-comp-oral", dose: bool = True, where: str | None = None) -> Case:
    """A study file that ``fit`` must refuse; the error names the file (and ``where``)."""

    def make(tmp: Path) -> tuple[list[object], str]:
        path = write(tmp, name, content)
        argv = ["fit", path, "--model", model, *(DOSE if dose else []), *FAST, *extra]
        return argv, str(path) if where is None else where

    return Case(id, make, words)


def option_case(id: str, extra: list[object], *words: str, where: str, command: str = "fit",
                outputs: bool = True) -> Case:
    """A command-line option that must be refused; the error names the option."""

    def make(tmp: Path) -> tuple[list[object], str]:
        data = write(tmp, "study.csv", GOOD)
        if command == "fit":
            argv = ["fit", data, *DOSE, *FAST, *extra]
            if "--model" not in extra and not any(str(x).startswith("--model") for x in extra):
                argv += ["--model", "one-comp-oral"]
        else:
            argv = [command, *extra]
        return argv, where

    return Case(id, make, words, outputs)


def custom(id: str, make: Callable[[Path], tuple[list[object], str]], *words: str, outputs: bool = True) -> Case:
    return Case(id, make, words, outputs)


def _excel(tmp: Path) -> Path:
    path = tmp / "study.xlsx"
    with pd.ExcelWriter(path) as xl:
        pd.read_csv(write(tmp, "source.csv", GOOD)).to_excel(xl, sheet_name="plasma", index=False)
    (tmp / "source.csv").unlink()
    return path


def _parquet_garbage(tmp: Path) -> tuple[list[object], str]:
    path = write(tmp, "study.parquet", b"PAR1" + bytes(range(200)))
    return ["fit", path, "--model", "one-comp-oral", *DOSE, *FAST], str(path)


# ---------------------------------------------------------------------------- data files
TWO_DOSE = "subject,time,conc,dose,route\n"
DATA_CASES = [
    data_case("empty-file", "", "the file is empty", "header line"),
    data_case("blank-lines-only", "\n \n\t\n", "the file is empty"),
    data_case("header-only", "subject,time,conc\n", "no data rows", "'conc'"),
    data_case("delimiter-vertical-bar", GOOD.replace(",", "|"), "separated by vertical bars", "commas"),
    data_case("delimiter-spaces", GOOD.replace(",", " "), "separated by spaces", "commas"),
    data_case("binary-garbage", bytes(range(256)) * 16, "binary", "CSV"),
    data_case("workbook-named-csv", b"PK\x03\x04" + bytes(300), "Excel workbook", ".xlsx"),
    # UTF-16 without a byte-order mark: every other byte is NUL, so it cannot be read as
    # text in any 8-bit encoding; the message says how to save it instead.
    data_case("encoding-utf16-without-bom", GOOD.encode("utf-16-le"), "NUL bytes", "UTF-8"),
    data_case("mixed-types-in-value-column", GOOD.replace("1,1,4.6", "1,1,abc"), "'abc' is not a number",
              "row 3", "column 'conc'"),
    data_case("numbers-mixed-with-date-times", "subject,time,conc\n1,2024-01-01 08:00,2\n1,1.5,3\n",
              "date-times", "row 3", "column 'time'"),
    data_case("duplicated-header", "subject,time,conc,conc\n1,0.5,3,3\n1,1,4,4\n", "names 'conc' twice",
              "distinct name"),
    data_case("no-time-column", "subject,hours_after,conc\n1,1,2\n1,2,1\n", "no column for the time",
              "--map time=COLUMN"),
    data_case("no-value-column", "subject,time,weight\n1,1,2\n1,2,1\n", "no column for the value", "--map"),
    data_case("negative-time", GOOD.replace("1,1,4.6", "1,-1,4.6"), "'-1' is negative", "row 3",
              "column 'time'"),
    data_case("non-numeric-time", GOOD.replace("1,1,4.6", "1,later,4.6"), "'later' is not a number", "row 3"),
    data_case("missing-time", GOOD.replace("1,1,4.6", "1,,4.6"), "the time is missing", "row 3"),
    data_case("nan-value", GOOD.replace("4.6", "NaN"), "'NaN' is not a finite number", "leave the cell empty"),
    data_case("inf-value", GOOD.replace("4.6", "inf"), "'inf' is not a finite number", "row 3"),
    data_case("minus-inf-time", GOOD.replace("1,1,4.6", "1,-inf,4.6"), "'-inf' is not a finite number",
              "column 'time'"),
    data_case("value-too-large-for-a-float", GOOD.replace("4.6", "1e400"), "'1e400' is not a finite number",
              "row 3"),
    data_case("time-too-large-for-a-float", GOOD.replace("1,1,4.6", "1,1e999,4.6"),
              "'1e999' is not a finite number", "column 'time'"),
    data_case("negative-concentration", GOOD.replace("4.6", "-4.6"), "'-4.6' is negative", "row 3"),
    data_case("dose-without-amount", TWO_DOSE + "1,0,,,oral\n1,1,4.6,,\n1,2,4.0,,\n", "no dose amount",
              "row 2", "column 'dose'", dose=False),
    data_case("unknown-route-in-file", TWO_DOSE + "1,0,,100,rectal\n1,1,4.6,,\n1,2,4.0,,\n",
              "'rectal' is not a route", "row 2", dose=False),
    data_case("negative-dose", TWO_DOSE + "1,0,,-100,oral\n1,1,4.6,,\n1,2,4.0,,\n", "-100", "row 2", dose=False),
    data_case("same-dose-twice", TWO_DOSE + "1,0,,100,oral\n1,0,,100,oral\n1,1,4.6,,\n1,2,4.0,,\n",
              "a second dose for the same subject at the same time", "row 3", dose=False),
    data_case("all-values-below-lloq", "subject,time,conc\n1,0.5,<0.1\n1,1,<0.1\n2,1,<0.2\n2,4,<0.2\n",
              "below the limit of quantification", "nothing can be estimated"),
    data_case("all-values-below-lloq-dropped", "subject,time,conc\n1,0.5,<0.1\n1,1,<0.1\n",
              "no subject has a usable observation", extra=("--blq", "drop")),
    data_case("blq-word-without-limit", GOOD.replace("4.6", "BLQ"), "no limit is known", "lloq column"),
    data_case("lloq-not-a-number", "subject,time,conc,lloq\n1,1,BLQ,abc\n1,2,2,0.1\n1,3,1,0.1\n",
              "'abc' is not a number", "column 'lloq'"),
    data_case("mapping-to-missing-column", GOOD, "names 'Plasma' for the value", "columns found",
              extra=("--map", "value=Plasma")),
    data_case("mapping-subject-to-missing-column", GOOD, "names 'Patient' for the subject",
              extra=("--map", "subject=Patient")),
    data_case("dose-column-missing", GOOD, "names 'Dose' for the dose", dose=False,
              extra=("--dose-column", "Dose", "--route", "oral")),
    data_case("dose-column-not-numbers", "subject,time,conc,Dose\n1,0.5,3,abc\n1,1,4,abc\n1,2,3,abc\n",
              "'abc' is not a number", "column 'Dose'", dose=False, extra=("--dose-column", "Dose", "--route", "oral")),
    data_case("blank-subject", "subject,time,conc\n,1,2\n1,1.5,3\n", "the subject is missing", "row 2"),
    data_case("ragged-row", GOOD + "2,24,0.1,9,9\n", "5 fields but the header has 3", "row 14"),
    data_case("cell-over-size-limit", GOOD.replace("4.6", "4" * 200_000), "cannot be split into cells", "row 3"),
    data_case("unknown-extension", "{}", "unknown file format '.json'", ".csv", name="study.json"),
    data_case("time-unit-contradicts-header", "subject,time (min),conc\n1,1,3\n1,2,2\n", "the header gives the unit 'min'",
              extra=("--time-unit", "h")),
    data_case("sheet-asked-of-a-csv", GOOD, "not an Excel workbook", "--sheet", extra=("--sheet", "plasma")),
    data_case("units-for-no-such-column", GOOD, "'foo' is neither a column role", "--units",
              extra=("--units", "foo=mg"), where="units"),
    data_case("no-dose-for-a-pk-model", GOOD, "no subject has a dose", "--dose AMOUNT", dose=False),
    custom("twenty-thousand-columns", lambda tmp: (
        ["fit", write(tmp, "wide.csv", ",".join(f"c{i}" for i in range(20_000)) + "\n"
                      + ",".join("1" for _ in range(20_000)) + "\n"), "--model", "one-comp-oral", *DOSE, *FAST],
        "wide.csv"), "no column for the time", "and 19988 more"),
    custom("excel-no-such-sheet", lambda tmp: (
        ["fit", _excel(tmp), "--model", "one-comp-oral", *DOSE, *FAST, "--sheet", "urine"], "study.xlsx"),
        "no sheet 'urine'", "'plasma'", "--sheet"),
    custom("excel-damaged", lambda tmp: (
        ["fit", write(tmp, "study.xlsx", b"not a zip"), "--model", "one-comp-oral", *DOSE, *FAST], "study.xlsx"),
        "cannot be opened"),
    custom("parquet-damaged", _parquet_garbage, "Parquet file cannot be read"),
    custom("data-file-missing", lambda tmp: (
        ["fit", tmp / "nope.csv", "--model", "one-comp-oral", *DOSE, *FAST], "nope.csv"), "no such file"),
    custom("data-file-is-a-folder", lambda tmp: (
        ["fit", (tmp / "folder.csv").mkdir() or tmp / "folder.csv", "--model", "one-comp-oral", *DOSE, *FAST],
        "folder.csv"), "is a folder"),
    custom("mapping-file-not-toml", lambda tmp: (
        ["fit", write(tmp, "study.csv", GOOD), "--model", "one-comp-oral", *DOSE, *FAST,
         "--map", write(tmp, "roles.toml", "subject = [unclosed\n")], "roles.toml"),
        "not valid TOML", "one line per role"),
]


# ---------------------------------------------------------------------------- templates
TEMPLATE = oral_template("mine", "one compartment, oral, for the hostile-template tests")


def _tsub(old: str, new: str) -> str:
    assert old in TEMPLATE, old
    return TEMPLATE.replace(old, new, 1)


def _line(text: str, marker: str) -> str:
    return f"line {text[: text.index(marker)].count(chr(10)) + 1}"


def template_case(id: str, text: str | bytes, *words: str, marker: str | None = None,
                  command: str = "fit") -> Case:
    """A template given as ``--model PATH`` (or to show/simulate); the error names file and line."""

    def make(tmp: Path) -> tuple[list[object], str]:
        path = write(tmp, "mine.toml", text)
        if command == "fit":
            argv = ["fit", write(tmp, "study.csv", GOOD), "--model", path, *DOSE, *FAST]
        else:
            argv = [command, path]
        where = str(path) + (f", {_line(text, marker)}" if marker and isinstance(text, str) else "")
        return argv, where

    return Case(id, make, words)


def _states(n: int) -> str:
    return _tsub('[states.depot]\nunit = "mg"\n', "".join(f'[states.s{i}]\nunit = "mg"\n' for i in range(n)))


def _big_template(tmp: Path) -> tuple[list[object], str]:
    path = tmp / "big.toml"
    with open(path, "wb") as handle:  # sparse: 50 MB on paper, no time to write
        handle.write(b'name = "big"\n')
        handle.truncate(50_000_000)
    return ["fit", write(tmp, "study.csv", GOOD), "--model", path, *DOSE, *FAST], str(path)


def _folder_template(name: str, text: str, command: str = "fit") -> Callable[[Path], tuple[list[object], str]]:
    def make(tmp: Path) -> tuple[list[object], str]:
        folder = tmp / "models"
        path = write(folder, f"{name}.toml", text)
        if command == "fit":
            argv = ["fit", write(tmp, "study.csv", GOOD), "--model", name, "--templates", folder, *DOSE, *FAST]
        else:
            argv = [command, name, "--templates", folder]
        return argv, str(path)

    return make


HOSTILE = "\"__import__('os').system('touch PWNED')\""
TEMPLATE_CASES = [
    template_case("toml-syntax", _tsub("default = 1.0", "default = "), "not valid TOML", marker="default = \n"),
    template_case("toml-duplicate-key", _tsub("upper = 100.0\n", "upper = 100.0\nupper = 5.0\n"), "not valid TOML",
                  marker="upper = 5.0"),
    template_case("missing-required-key", _tsub('time_unit = "h"\n', ""), "missing required key 'time_unit'"),
    template_case("unknown-key", _tsub('kind = "pk"', 'kind = "pk"\ncolour = "red"'), "unknown key 'colour'",
                  "allowed keys", marker="colour"),
    template_case("wrong-type", _tsub("default = 1.0", 'default = "fast"'), "must be a number",
                  marker='default = "fast"'),
    template_case("undeclared-name", _tsub("ke*central", "kk*central"), "unknown name 'kk'", "declared names",
                  marker='central = "ka*depot - kk'),
    template_case("hostile-import", _tsub('"-ka*depot"', HOSTILE), "'__'", "not allowed", marker="depot = \"__"),
    template_case("hostile-attribute", _tsub('"central / V"', '"central.__class__"'), "attribute access",
                  marker='"central.__class__"'),
    template_case("hostile-lambda", _tsub('"-ka*depot"', '"lambda: 0"'), "keyword 'lambda'", marker='"lambda: 0"'),
    template_case("hostile-string", _tsub('"central / V"', "\"open('x').read()\""), "strings are not allowed",
                  marker="\"open("),
    template_case("power-tower", _tsub('"-ka*depot"', '"9**9**9**9*depot"'), "exponent", "larger than 1000",
                  marker='"9**9**9**9'),
    template_case("nested-parentheses-100", _tsub('"-ka*depot"', '"' + "(" * 100 + "ka" + ")" * 100 + '*depot"'),
                  "nested too deeply", marker="depot = \"((("),
    template_case("nested-parentheses-5000", _tsub('"-ka*depot"', '"' + "(" * 5000 + "ka" + ")" * 5000 + '*depot"'),
                  "the limit is 2000", marker="depot = \"((("),
    template_case("five-thousand-states", _states(5000), "the limit is 200", marker="[states.s0]"),
    template_case("deeply-nested-toml", "x = " + "[" * 100_000 + "\n", "nested too deeply"),
    template_case("not-utf8", b'name = "mine"\n# \xff\xfe\n', "not UTF-8"),
    template_case("not-a-template-at-all", bytes(range(256)), "not"),
    template_case("hostile-via-show", _tsub('"-ka*depot"', HOSTILE), "not allowed", command="show"),
    template_case("hostile-via-simulate", _tsub('"-ka*depot"', HOSTILE), "not allowed", command="simulate"),
    custom("fifty-megabyte-template", _big_template, "50.0 MB", "the limit is 1 MB"),
    custom("template-file-missing", lambda tmp: (
        ["fit", write(tmp, "study.csv", GOOD), "--model", tmp / "none.toml", *DOSE, *FAST], "none.toml"),
        "not found"),
    custom("templates-folder-broken-template", _folder_template("mine", _tsub('"-ka*depot"', '"9**9**9**9*depot"')),
           "exponent"),
    custom("templates-folder-hostile-show", _folder_template("mine", _tsub('"-ka*depot"', HOSTILE), "show"),
           "not allowed"),
    custom("templates-folder-missing", lambda tmp: (
        ["fit", write(tmp, "study.csv", GOOD), "--model", "one-comp-oral", "--templates", tmp / "nowhere",
         *DOSE, *FAST], "nowhere"), "does not exist"),
]


# ---------------------------------------------------------------------------- options
def _existing(kind: str) -> Callable[[Path], tuple[list[object], str]]:
    """Output that exists already, without --overwrite."""

    def make(tmp: Path) -> tuple[list[object], str]:
        data = write(tmp, "study.csv", GOOD)
        base = ["fit", data, "--model", "one-comp-oral", *DOSE, *FAST]
        if kind == "json":
            target = write(tmp, "run.json", '{"from": "an earlier run"}')
            return [*base, "--json", target], "--json"
        if kind == "report":
            target = write(tmp, "report.md", "# an earlier run\n")
            return [*base, "--report", target], "--report"
        if kind == "out":
            write(tmp, f"out/{MARKER}", "written by compartments\n")
            write(tmp, "out/fits.csv", "subject,model\n1,one-comp-oral\n")
            return [*base, "--out", tmp / "out"], "--out"
        if kind == "run-dir":
            write(tmp, "run/run.json", "{}")
            return [*base, "--run-dir", tmp / "run"], "--run-dir"
        if kind == "nca-out":
            write(tmp, f"nca/{MARKER}", "written by compartments\n")
            return ["nca", data, *DOSE, "--out", tmp / "nca"], "--out"
        if kind == "simulate-out":
            target = write(tmp, "sim.csv", "time\n0\n")
            return ["simulate", "one-comp-oral", "--out", target, "--dose", "100:oral"], "sim.csv"
        raise AssertionError(kind)

    return make


def _unwritable(option: str) -> Callable[[Path], tuple[list[object], str]]:
    def make(tmp: Path) -> tuple[list[object], str]:
        locked = unwritable(tmp)
        data = write(tmp, "study.csv", GOOD)
        name = {"--json": "run.json", "--report": "report.md", "--out": "out", "--run-dir": "run"}[option]
        return ["fit", data, "--model", "one-comp-oral", *DOSE, *FAST, option, locked / name], option

    return make


OPTION_CASES = [
    option_case("unknown-model", ["--model", "one-comp-orl"], "unknown template 'one-comp-orl'",
                "did you mean 'one-comp-oral'", where="one-comp-orl"),
    option_case("no-model", ["--model="], "no model given", where="--model"),
    custom("model-option-missing", lambda tmp: (["fit", write(tmp, "study.csv", GOOD), *DOSE, *FAST],
                                                "compartments fit --help"), "Missing option '--model'"),
    option_case("unknown-option", ["--frobnicate"], "No such option: --frobnicate", where="--help"),
    option_case("unknown-command", [], "No such command 'fitt'", "Did you mean 'fit'", where="--help",
                command="fitt"),
    option_case("seed-not-a-number", ["--seed", "abc"], "Invalid value for '--seed'", where="--seed"),
    option_case("seed-negative", ["--seed", "-1"], "must be 0 or more", where="--seed"),
    option_case("workers-zero", ["--workers", "0"], "must be 1 or more", where="--workers"),
    option_case("bootstrap-negative", ["--bootstrap", "-1"], "must be 0 or more", where="--bootstrap"),
    option_case("bootstrap-absurd", ["--bootstrap", "100000000"], "more than 10000", where="--bootstrap"),
    option_case("error-model-unknown", ["--error", "gaussian"], "is not an option", "additive", where="--error"),
    option_case("strategy-unknown", ["--strategy", "fast"], "is not an option", "nls", where="--strategy"),
    option_case("fix-syntax", ["--fix", "ka"], "write NAME=VALUE", where="--fix"),
    option_case("fix-not-finite", ["--fix", "ka=inf"], "finite number", where="--fix"),
    option_case("fix-below-range", ["--fix", "ka=-5"], "outside the range", "0.01 to 100", where="fixed ka"),
    option_case("fix-above-range", ["--fix", "ka=1e300"], "outside the range", where="fixed ka"),
    option_case("fix-unknown-parameter", ["--fix", "kz=1"], "'kz' is in none of the templates", where="kz"),
    option_case("estimate-unknown-parameter", ["--estimate", "zz"], "'zz' is in none of the templates", where="zz"),
    option_case("dose-negative", ["--dose", "-5"], "must be a finite number > 0", where="--dose"),
    option_case("dose-nan", ["--dose", "nan"], "must be a finite number > 0", where="--dose"),
    option_case("dose-time-negative", ["--dose-time", "-1"], "≥ 0", where="--dose-time"),
    option_case("duration-zero", ["--duration", "0"], "> 0", where="--duration"),
    option_case("fit-timeout-zero", ["--fit-timeout", "0"], "> 0", where="--fit-timeout"),
    option_case("route-unknown", ["--route", "nasal"], "is not a route", "oral", where="nasal"),
    option_case("time-unit-unknown", ["--time-unit", "fortnight"], "is not a time unit", where="fortnight"),
    option_case("blq-unknown", ["--blq", "ignore"], "is not an option", where="--blq"),
    option_case("units-syntax", ["--units", "value"], "write ROLE=NAME", where="--units"),
    option_case("map-syntax", ["--map", "subject"], "no such mapping file", "ROLE=COLUMN", where="--map"),
    option_case("map-unknown-role", ["--map", "dv=conc"], "unknown column role 'dv'", where="dv"),
    option_case("subject-unknown", ["--subject", "99"], "no subject '99'", where="99"),
    option_case("group-by-not-a-covariate", ["--group-by", "Height"], "is not a covariate", where="--group-by"),
    option_case("models-in-different-time-units", ["--model", "one-comp-oral,predator-prey"],
                "different time units", where="predator-prey"),
    option_case("same-model-twice", ["--model", "one-comp-oral", "--model", "one-comp-oral"],
                "give each model once", where="--model"),
    option_case("resume-folder-missing", ["--resume", "no-such-run"], "no such folder", where="--resume",
                outputs=False),
    option_case("run-dir-and-resume", ["--run-dir", "a", "--resume", "b"], "not both", where="--run-dir",
                outputs=False),
    option_case("out-parent-missing", ["--out", "no/such/folder"], "does not exist; create it first", where="--out",
                outputs=False),
    custom("json-is-a-folder", lambda tmp: (
        ["fit", write(tmp, "study.csv", GOOD), "--model", "one-comp-oral", *DOSE, *FAST, "--json", tmp], "--json"),
        "is a folder", outputs=False),
    custom("existing-json-without-overwrite", _existing("json"), "already exists", "--overwrite", outputs=False),
    custom("existing-report-without-overwrite", _existing("report"), "already exists", "--overwrite", outputs=False),
    custom("existing-out-without-overwrite", _existing("out"), "already exists", "--overwrite", outputs=False),
    custom("existing-run-dir", _existing("run-dir"), "not an empty folder", "--resume", outputs=False),
    custom("existing-nca-out-without-overwrite", _existing("nca-out"), "already exists", outputs=False),
    custom("existing-simulate-out-without-overwrite", _existing("simulate-out"), "already exists", outputs=False),
    custom("json-folder-not-writable", _unwritable("--json"), "is not writable", outputs=False),
    custom("report-folder-not-writable", _unwritable("--report"), "is not writable", outputs=False),
    custom("out-folder-not-writable", _unwritable("--out"), "is not writable", outputs=False),
    custom("run-dir-folder-not-writable", _unwritable("--run-dir"), "is not writable", outputs=False),
    option_case("simulate-param-syntax", ["one-comp-oral", "--param", "ka"], "write NAME=VALUE",
                where="--param", command="simulate"),
    option_case("simulate-param-not-a-number", ["one-comp-oral", "--param", "ka=fast"], "'fast' is not a number",
                where="--param", command="simulate"),
    option_case("simulate-param-unknown", ["one-comp-oral", "--param", "kz=1"], "'kz' is not in template",
                where="kz", command="simulate"),
    option_case("simulate-param-negative", ["one-comp-oral", "--param", "ka=-1"], "is negative", "0 or more",
                where="ka", command="simulate"),
    option_case("simulate-zero-volume", ["one-comp-oral", "--param", "V=0"], "is not finite", "--param",
                where="concentration", command="simulate"),
    # ka = 1e308 alone now has an exact finite answer (instant absorption, by the eigen engine);
    # ka = ke = 1e308 takes the matrix exponential (repeated eigenvalue), which overflows
    option_case("simulate-overflow", ["one-comp-oral", "--param", "ka=1e308", "--param", "ke=1e308",
                                      "--dose", "100:oral"],
                "non-finite", where="one-comp-oral", command="simulate"),
    option_case("simulate-dose-route", ["one-comp-oral", "--dose", "100:nasal"], "unknown route 'nasal'",
                where="--dose", command="simulate"),
    option_case("simulate-dose-repeats-absurd", ["one-comp-oral", "--dose", "100:oral x100000000/12"],
                "at most 10000", where="--dose", command="simulate"),
    option_case("simulate-times-backwards", ["one-comp-oral", "--times", "0:-1:1"], "START:STOP:STEP",
                where="--times", command="simulate"),
    option_case("simulate-times-billion-points", ["one-comp-oral", "--times", "0:1e9:0.001"],
                "more than a million", where="--times", command="simulate"),
    option_case("simulate-times-negative", ["one-comp-oral", "--times", "-1,2"], "≥ 0", where="--times",
                command="simulate"),
    option_case("simulate-setting-out-of-range", ["transit-oral", "--set", "n_transit=0"], "from 1 to 50",
                where="n_transit", command="simulate"),
    option_case("show-unknown-template", ["nope"], "unknown template 'nope'", where="nope", command="show"),
    custom("nca-route-unknown", lambda tmp: (
        ["nca", write(tmp, "study.csv", GOOD), "--dose", "100", "--route", "rectal"], "rectal"), "is not a route",
        outputs=False),
    custom("inspect-folder", lambda tmp: (["inspect", tmp], str(tmp)), "is a folder", outputs=False),
]

ALL_CASES = DATA_CASES + TEMPLATE_CASES + OPTION_CASES


def _outputs(argv: list[object], tmp: Path) -> list[object]:
    """Point every output a command takes into ``tmp``."""
    command = str(argv[0])
    if command == "fit":
        return [*argv, "--json", tmp / "run.json", "--out", tmp / "out", "--report", tmp / "report.md",
                "--run-dir", tmp / "run"]
    if command == "nca":
        return [*argv, "--out", tmp / "nca"]
    if command == "simulate":
        return [*argv, "--out", tmp / "sim.csv"]
    return argv


class TestBattery:
    """Each bad input: exit 2, one line naming what and where, no traceback, nothing written."""

    def test_battery_is_large(self) -> None:
        """At least sixty distinct cases, data files, templates and options each well represented."""
        ids = [c.id for c in ALL_CASES]
        assert len(set(ids)) == len(ids)
        assert len(ids) >= 60
        assert min(len(DATA_CASES), len(TEMPLATE_CASES), len(OPTION_CASES)) >= 15

    @pytest.mark.parametrize("case", ALL_CASES, ids=[c.id for c in ALL_CASES])
    def test_refused(self, case: Case, tmp_path: Path, capfd: pytest.CaptureFixture[str],
                     monkeypatch: pytest.MonkeyPatch) -> None:
        monkeypatch.chdir(tmp_path)  # relative names in a case land here too
        argv, where = case.make(tmp_path)
        if case.outputs:
            argv = _outputs(argv, tmp_path)
        before = snapshot(tmp_path)
        code, caught = run(argv)
        out, err = capfd.readouterr()
        lines = [ln for ln in err.splitlines() if ln.strip()]
        assert code == 2, (out[-2000:], err[-2000:])
        assert "Traceback" not in out and "Traceback" not in err
        assert len(lines) == 1, err[-3000:]
        line = lines[0]
        assert line.startswith("compartments: error: "), line
        assert where in line, (where, line)
        for word in case.words:
            assert word in line, (word, line)
        assert len(line) < 1000, line[:300]  # one readable line, not a dump of the input
        assert caught == [], [str(w.message) for w in caught]
        assert snapshot(tmp_path) == before
        assert not (tmp_path / "PWNED").exists()

    def test_hostile_template_leaves_no_trace(self, tmp_path: Path, capfd: pytest.CaptureFixture[str],
                                              monkeypatch: pytest.MonkeyPatch) -> None:
        """The hostile equation names a command to run in the current folder; it is never run."""
        monkeypatch.chdir(tmp_path)
        path = write(tmp_path, "mine.toml", _tsub('"-ka*depot"', HOSTILE))
        for command in (["show", path], ["simulate", path], ["fit", write(tmp_path, "s.csv", GOOD),
                                                               "--model", path, *DOSE, *FAST]):
            assert run(command)[0] == 2
        capfd.readouterr()
        assert not (tmp_path / "PWNED").exists()


class TestNotAnError:
    """Inputs that look bad but are not errors of the whole run: each says why."""

    def _fit(self, tmp: Path, text: str, *extra: object) -> tuple[int, dict, str]:
        data = write(tmp, "study.csv", text)
        js = tmp / "run.json"
        code, _ = run(["fit", data, "--strategy", "nls", "--workers", "1", "--json", js, *extra])
        doc = json.loads(js.read_text(encoding="utf-8")) if js.exists() else {}
        return code, doc, str(data)

    def test_one_observation_and_four_parameters(self, tmp_path: Path, capfd) -> None:
        """Not an error of the run: subject 'b' (one sample) is refused *for two-comp-iv*, with the reason,
        while subject 'a' is fitted; the run ends with exit 3 (some fits failed), report and JSON written."""
        text = "subject,time,conc\n" + "".join(f"a,{t},{c}\n" for t, c in
                                                [(0.25, 9.1), (0.5, 8.0), (1, 6.6), (2, 4.9), (4, 3.1),
                                                 (8, 1.6), (12, 0.9), (24, 0.2)]) + "b,2,4.0\n"
        code, doc, _ = self._fit(tmp_path, text, "--model", "two-comp-iv", "--dose", "100", "--route", "iv")
        out, err = capfd.readouterr()
        assert code == 3 and "Traceback" not in out + err
        fits = {f["subject"]: f for f in doc["fits"]}
        assert fits["a"]["status"] == "ok"
        assert fits["b"]["status"] == "failed"
        assert "1 quantified observation(s) cannot determine the 4 parameters" in fits["b"]["message"]
        text = " ".join(out.replace("│", " ").split())
        assert "two-comp-iv · subject b" in text and "failed: subject b: 1 quantified observation(s)" in text
        assert "2 fit(s): 1 ok, 1 failed." in text

    def test_one_subject_all_below_lloq_among_others(self, tmp_path: Path, capfd) -> None:
        """Not an error of the run: the study has quantified values; the subject with none is refused
        with the reason and the other subjects are fitted (exit 3)."""
        text = GOOD + "3,1,<0.1\n3,2,<0.1\n3,4,<0.1\n"
        code, doc, _ = self._fit(tmp_path, text, "--model", "one-comp-oral", *DOSE)
        capfd.readouterr()
        assert code == 3
        status = {f["subject"]: f["status"] for f in doc["fits"]}
        assert status == {"1": "ok", "2": "ok", "3": "failed"}
        msg = next(f["message"] for f in doc["fits"] if f["subject"] == "3")
        assert "0 quantified observation(s)" in msg

    def test_model_without_the_dose_route(self, tmp_path: Path, capfd) -> None:
        """Not an error of the run: oral doses cannot enter one-comp-iv, so that model fails for every
        subject with the reason while one-comp-oral fits them (exit 3)."""
        code, doc, _ = self._fit(tmp_path, GOOD, "--model", "one-comp-oral,one-comp-iv", *DOSE)
        capfd.readouterr()
        assert code == 3
        for f in doc["fits"]:
            if f["model"] == "one-comp-iv":
                assert f["status"] == "failed" and "no 'oral' dose input" in f["message"]
            else:
                assert f["status"] == "ok"

    def test_latin1_file_is_read_with_a_note(self, tmp_path: Path, capfd) -> None:
        """Not an error: a Latin-1 file decodes (every byte is a Latin-1 character); the run says so
        in the read notes of the JSON, so a wrong guess can be seen."""
        data = write(tmp_path, "study.csv", GOOD.replace("conc", "conc (µg/mL)").encode("latin-1"))
        js = tmp_path / "run.json"
        code, _ = run(["fit", data, "--model", "one-comp-oral", *DOSE, *FAST, "--json", js])
        capfd.readouterr()
        assert code == 0
        notes = json.loads(js.read_text(encoding="utf-8"))["input"]["notes"]
        assert any("not valid UTF-8" in n and "Latin-1" in n for n in notes)

    def test_no_subject_column_is_one_subject(self, tmp_path: Path, capfd) -> None:
        """Not an error: a file without a subject column is one subject's series (common for a single
        animal or a single culture); the read notes say so."""
        data = write(tmp_path, "study.csv", "time,conc\n0.5,3.1\n1,4.6\n2,4.2\n4,3.0\n8,1.6\n12,0.8\n")
        js = tmp_path / "run.json"
        code, _ = run(["fit", data, "--model", "one-comp-oral", *DOSE, *FAST, "--json", js])
        capfd.readouterr()
        assert code == 0
        doc = json.loads(js.read_text(encoding="utf-8"))
        assert [f["subject"] for f in doc["fits"]] == ["1"]
        assert any("no subject column" in n for n in doc["input"]["notes"])

    def test_semicolon_file_with_decimal_points(self, tmp_path: Path, capfd) -> None:
        """Not an error: semicolon-separated files (spreadsheet exports in many locales) are read."""
        data = write(tmp_path, "study.csv", GOOD.replace(",", ";"))
        code, _ = run(["inspect", data, *DOSE])
        out, _ = capfd.readouterr()
        assert code == 0 and "12" in out
