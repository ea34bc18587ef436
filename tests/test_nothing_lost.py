"""Nothing lost: every output is written to a temporary name and renamed; runs never mix.

Interruptions are simulated by making a writer raise half-way through a file
(``KeyboardInterrupt`` as from Ctrl-C, ``OSError`` as from a full disk). After one, the
file or folder from the earlier run must be intact byte for byte, and no temporary or
partial file may remain anywhere. POSIX ``rename`` (``os.replace``) within one folder is
atomic (POSIX.1-2017, rename()), which is what :mod:`compartments.atomic` relies on.
"""

from __future__ import annotations

import hashlib
import json
import os
import stat
from pathlib import Path

import matplotlib.figure
import pandas as pd
import pytest
from cli_run import run

from compartments import atomic
from compartments.cli.data_cmd import MARKER

ROWS = (
    "subject,time,conc\n"
    "1,0.5,3.1\n1,1,4.6\n1,2,4.2\n1,4,3.0\n1,8,1.6\n1,12,0.8\n"
    "2,0.5,2.2\n2,1,3.9\n2,2,4.4\n2,4,3.4\n2,8,2.0\n2,12,1.1\n"
)
BASE = ["--model", "one-comp-oral", "--dose", "100", "--route", "oral", "--strategy", "nls", "--workers", "1",
        "--quiet"]



def snapshot(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): ("<dir>" if p.is_dir() else hashlib.sha256(p.read_bytes()).hexdigest())
            for p in sorted(root.rglob("*"))}


def leftovers(root: Path) -> list[str]:
    """Temporary files and staging folders (their names start with a dot)."""
    return [str(p.relative_to(root)) for p in root.rglob(".*") if p.name != MARKER]


def one_error_line(err: str) -> str:
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


@pytest.fixture
def data(tmp_path: Path) -> Path:
    path = tmp_path / "study.csv"
    path.write_text(ROWS, encoding="utf-8")
    return path


class TestAtomicPath:
    """compartments.atomic alone."""

    def test_interrupted_write_keeps_the_old_file(self, tmp_path: Path) -> None:
        """Ctrl-C half-way through: the old content stays and the temporary file is removed."""
        target = tmp_path / "result.json"
        target.write_text("old and whole", encoding="utf-8")
        with pytest.raises(KeyboardInterrupt), atomic.atomic_path(target) as tmp:
            tmp.write_text("new and ha", encoding="utf-8")
            raise KeyboardInterrupt
        assert target.read_text(encoding="utf-8") == "old and whole"
        assert sorted(p.name for p in tmp_path.iterdir()) == ["result.json"]

    def test_failed_rename_keeps_the_old_file(self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
        """If the final rename itself fails (e.g. the folder became read-only), nothing changes."""
        target = tmp_path / "table.csv"
        target.write_bytes(b"a,b\n1,2\n")

        def refuse(src: object, dst: object) -> None:
            raise PermissionError(13, "Permission denied", str(dst))

        monkeypatch.setattr(atomic.os, "replace", refuse)
        with pytest.raises(PermissionError):
            atomic.write_bytes(target, b"x,y\n3,4\n")
        monkeypatch.undo()
        assert target.read_bytes() == b"a,b\n1,2\n"
        assert sorted(p.name for p in tmp_path.iterdir()) == ["table.csv"]

    def test_new_file_appears_whole(self, tmp_path: Path) -> None:
        """Without an interruption the new content replaces the old; permissions as open() gives."""
        target = tmp_path / "notes.md"
        target.write_text("old", encoding="utf-8")
        atomic.write_text(target, "new")
        assert target.read_text(encoding="utf-8") == "new"
        umask = os.umask(0)
        os.umask(umask)
        assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~umask
        assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.md"]

    def test_temporary_name_is_in_the_same_folder(self, tmp_path: Path) -> None:
        """The temporary file sits beside the target (a rename across file systems is not atomic)."""
        target = tmp_path / "sub" / "x.txt"
        target.parent.mkdir()
        with atomic.atomic_path(target) as tmp:
            assert tmp.parent == target.parent and tmp.name.startswith(".x.txt.") and tmp.name.endswith(".part")
            tmp.write_text("x", encoding="utf-8")


class TestEveryOutputIsRenamedIntoPlace:
    def test_all_files_of_a_run(self, data: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capfd) -> None:
        """JSON, CSV tables, plots and Markdown: each file arrives by a rename from a '.NAME.*.part' file.
        (The --out folder is itself built beside its place and renamed in whole.)"""
        renames: list[tuple[str, str]] = []
        real = os.replace

        def recording(src: str | os.PathLike[str], dst: str | os.PathLike[str]) -> None:
            renames.append((os.fspath(src), os.fspath(dst)))
            real(src, dst)

        monkeypatch.setattr(os, "replace", recording)
        out, js, md = tmp_path / "out", tmp_path / "run.json", tmp_path / "report.md"
        assert run(["fit", data, *BASE, "--out", out, "--json", js, "--report", md]) == 0
        capfd.readouterr()
        arrived = {Path(dst).name for src, dst in renames
                   if Path(src).name.startswith(f".{Path(dst).name}.") and src.endswith(".part")}
        written = {p.name for p in out.iterdir() if p.name != MARKER} | {js.name, md.name}
        kinds = {p.suffix for p in out.iterdir()}
        assert {".csv", ".png"} <= kinds
        assert written <= arrived, written - arrived
        # the staging folder was renamed onto out/ in one step
        assert any(Path(dst) == out and Path(src).name.startswith(".out.") for src, dst in renames)
        assert leftovers(tmp_path) == []


def _half_then(exc: BaseException, marker: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """Writes to a temporary file whose name contains ``marker`` stop half-way with ``exc``."""
    real_write_text = Path.write_text

    def write_text(self: Path, text: str, *args: object, **kwargs: object) -> int:
        if marker in self.name and self.name.endswith(".part"):
            real_write_text(self, text[: len(text) // 2], *args, **kwargs)
            raise exc
        return real_write_text(self, text, *args, **kwargs)

    monkeypatch.setattr(Path, "write_text", write_text)


class TestInterruptedRunKeepsTheOldFiles:
    """An earlier run's files survive an interrupted rerun with --overwrite, whole."""

    def _first_run(self, data: Path, tmp_path: Path, capfd, *extra: object) -> dict[str, str]:
        assert run(["fit", data, *BASE, *extra]) == 0
        capfd.readouterr()
        return snapshot(tmp_path)

    def test_json_interrupted(self, data: Path, tmp_path: Path, capfd, monkeypatch: pytest.MonkeyPatch) -> None:
        """Ctrl-C while the new JSON is half written: exit 130, the old JSON intact."""
        js = tmp_path / "run.json"
        before = self._first_run(data, tmp_path, capfd, "--json", js)
        old = json.loads(js.read_text(encoding="utf-8"))
        _half_then(KeyboardInterrupt(), "run.json", monkeypatch)
        code = run(["fit", data, *BASE, "--json", js, "--overwrite", "--seed", "7"])
        _, err = capfd.readouterr()
        assert code == 130 and "interrupted" in one_error_line(err)
        assert snapshot(tmp_path) == before and json.loads(js.read_text(encoding="utf-8")) == old
        assert leftovers(tmp_path) == []

    def test_markdown_disk_full(self, data: Path, tmp_path: Path, capfd, monkeypatch: pytest.MonkeyPatch) -> None:
        """A full disk while the Markdown report is written: exit 2 with one line, old report and its
        plot folder intact, nothing partial left."""
        md = tmp_path / "report.md"
        before = self._first_run(data, tmp_path, capfd, "--report", md)
        _half_then(OSError(28, "No space left on device"), "report.md", monkeypatch)
        code = run(["fit", data, *BASE, "--report", md, "--overwrite"])
        _, err = capfd.readouterr()
        assert code == 2 and "No space left on device" in one_error_line(err)
        assert snapshot(tmp_path) == before
        assert leftovers(tmp_path) == []

    def test_csv_interrupted_in_out_folder(self, data: Path, tmp_path: Path, capfd,
                                           monkeypatch: pytest.MonkeyPatch) -> None:
        """Ctrl-C half-way through the third CSV table of --out: the old folder stays as it was."""
        out = tmp_path / "out"
        before = self._first_run(data, tmp_path, capfd, "--out", out)
        real = pd.DataFrame.to_csv
        calls = {"n": 0}

        def to_csv(self: pd.DataFrame, path: object = None, *args: object, **kwargs: object) -> object:
            calls["n"] += 1
            if calls["n"] == 3:
                Path(str(path)).write_bytes(b"subject,model\n1,one-co")
                raise KeyboardInterrupt
            return real(self, path, *args, **kwargs)

        monkeypatch.setattr(pd.DataFrame, "to_csv", to_csv)
        code = run(["fit", data, *BASE, "--out", out, "--overwrite"])
        _, err = capfd.readouterr()
        assert code == 130 and calls["n"] == 3
        assert snapshot(tmp_path) == before
        assert leftovers(tmp_path) == []

    def test_plot_fails_in_out_folder(self, data: Path, tmp_path: Path, capfd,
                                      monkeypatch: pytest.MonkeyPatch) -> None:
        """A plot that fails half-written (disk full): one line, exit 2, old folder intact."""
        out = tmp_path / "out"
        before = self._first_run(data, tmp_path, capfd, "--out", out)

        def savefig(self: object, fname: object, *args: object, **kwargs: object) -> None:
            Path(str(fname)).write_bytes(b"\x89PNG\r\n\x1a\n half")
            raise OSError(28, "No space left on device")

        monkeypatch.setattr(matplotlib.figure.Figure, "savefig", savefig)
        code = run(["fit", data, *BASE, "--out", out, "--overwrite"])
        _, err = capfd.readouterr()
        assert code == 2 and "No space left on device" in one_error_line(err)
        assert snapshot(tmp_path) == before
        assert leftovers(tmp_path) == []


class TestRunsNeverMix:
    def test_rerun_refused_then_replaced_whole(self, data: Path, tmp_path: Path, capfd) -> None:
        """Run 1 (two subjects) writes out/ and run.json. Run 2 without --overwrite is refused with one
        line and changes nothing; with --overwrite (one subject only) out/ holds run 2's files and
        nothing of run 1 (no subject_2.png left over)."""
        out, js = tmp_path / "out", tmp_path / "run.json"
        assert run(["fit", data, *BASE, "--out", out, "--json", js]) == 0
        capfd.readouterr()
        assert (out / "subject_2.png").is_file()
        first = snapshot(tmp_path)
        for extra in (["--out", out], ["--json", js], ["--out", out, "--json", js]):
            assert run(["fit", data, *BASE, "--subject", "1", *extra]) == 2
            assert "--overwrite" in one_error_line(capfd.readouterr().err)
            assert snapshot(tmp_path) == first
        assert run(["fit", data, *BASE, "--subject", "1", "--out", out, "--json", js, "--overwrite"]) == 0
        capfd.readouterr()
        assert not (out / "subject_2.png").exists() and (out / "subject_1.png").is_file()
        assert set(pd.read_csv(out / "fits.csv").subject.astype(str)) == {"1"}
        assert [f["subject"] for f in json.loads(js.read_text(encoding="utf-8"))["fits"]] == ["1"]
        assert leftovers(tmp_path) == []

    def test_run_dir_never_reused_silently(self, data: Path, tmp_path: Path, capfd) -> None:
        """A saved run directory is refused as a new --run-dir, and --resume with other settings is
        refused with one line; the saved fits are untouched."""
        rd = tmp_path / "run"
        assert run(["fit", data, *BASE, "--run-dir", rd]) == 0
        capfd.readouterr()
        saved = snapshot(rd)
        assert run(["fit", data, *BASE, "--run-dir", rd]) == 2
        assert "--resume" in one_error_line(capfd.readouterr().err)
        assert run(["fit", data, *BASE, "--resume", rd, "--error", "proportional"]) == 2
        assert "other settings" in one_error_line(capfd.readouterr().err)
        assert snapshot(rd) == saved
