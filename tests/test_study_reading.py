"""What the reader does with valid files: censored values, units, time units, date-times,
order, replicates, formats, column roles, covariates. Expected values are worked by hand
from the small files written here."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import sympy as sp

from compartments.dosing import Dose
from compartments.io import check_units
from compartments.study import Study, Subject, SubjectNotFound, read_study
from compartments.template import Observable, Template


def write(tmp_path, text, name="study.csv", encoding="utf-8"):
    path = tmp_path / name
    path.write_bytes(text.encode(encoding) if isinstance(text, str) else text)
    return path


def one(study):
    (subject,) = study.subjects
    return subject


class TestBelowLimit:
    """Values below the lower limit of quantification (LLOQ)."""

    @pytest.mark.parametrize("word", ["BLQ", "blq", "BQL", "bql", "ND", "nd", "<LLOQ", "<lloq", "below LLOQ",
                                      "Below  lloq", "BLOQ", "<LOQ"])
    def test_words_with_lloq_column(self, tmp_path, word):
        """Every spelling is censored at the lloq column's value."""
        path = write(tmp_path, f"subject,time,conc,lloq\n1,1,2.0,0.1\n1,8,{word},0.1\n")
        s = one(read_study(path, dose=10, route="iv"))
        assert s.censored.tolist() == [False, True]
        assert s.values.tolist() == [2.0, 0.1]
        assert s.lloq.tolist() == [0.1, 0.1]

    @pytest.mark.parametrize("text,limit", [("<0.1", 0.1), ("< 0.05", 0.05), ("<1e-3", 1e-3)])
    def test_less_than_gives_the_limit(self, tmp_path, text, limit):
        path = write(tmp_path, f"subject,time,conc\n1,1,2.0\n1,8,{text}\n")
        s = one(read_study(path, dose=10, route="iv"))
        assert s.censored.tolist() == [False, True]
        assert s.values[1] == limit and s.lloq[1] == limit
        assert np.isnan(s.lloq[0])

    def test_number_below_lloq_column(self, tmp_path):
        """A number below its row's LLOQ is censored at the LLOQ, with a note keeping the number."""
        path = write(tmp_path, "subject,time,conc,lloq\n1,1,2.0,0.1\n1,8,0.04,0.1\n")
        study = read_study(path, dose=10, route="iv")
        assert one(study).censored.tolist() == [False, True]
        assert one(study).values[1] == 0.1
        (note,) = [n for n in study.notes if n.row == 3]
        assert note.action == "changed" and "0.04" in note.reason and note.column == "conc"

    def test_limit_text_clashing_with_column_is_flagged(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,lloq\n1,1,2.0,0.2\n1,8,<0.1,0.2\n")
        study = read_study(path, dose=10, route="iv")
        assert one(study).lloq[1] == 0.1
        assert any(n.action == "flagged" and n.row == 3 for n in study.notes)

    FILE = "subject,time,conc,lloq\n1,1,2.0,0.1\n1,4,0.5,0.1\n1,8,BLQ,0.1\n1,12,<0.1,\n"

    def test_censor_mode(self, tmp_path):
        study = read_study(write(tmp_path, self.FILE), dose=10, route="iv", blq="censor")
        s = one(study)
        assert s.censored.tolist() == [False, False, True, True]
        assert s.values.tolist() == [2.0, 0.5, 0.1, 0.1]
        assert [n.row for n in study.notes if n.action == "changed"] == [4, 5]

    def test_drop_mode(self, tmp_path):
        study = read_study(write(tmp_path, self.FILE), dose=10, route="iv", blq="drop")
        s = one(study)
        assert s.times.tolist() == [1.0, 4.0] and not s.censored.any()
        assert [(n.row, n.action) for n in study.notes if n.column == "conc"] == [(4, "dropped"), (5, "dropped")]

    def test_half_mode(self, tmp_path):
        study = read_study(write(tmp_path, self.FILE), dose=10, route="iv", blq="half")
        s = one(study)
        assert s.values.tolist() == [2.0, 0.5, 0.05, 0.05] and not s.censored.any()
        assert s.lloq[2] == 0.1
        assert all("half the LLOQ" in n.reason for n in study.notes if n.action == "changed")

    def test_drop_mode_needs_no_limit(self, tmp_path):
        """With blq='drop' a BLQ word without a known limit is simply dropped."""
        path = write(tmp_path, "subject,time,conc\n1,1,2.0\n1,8,BLQ\n")
        assert one(read_study(path, dose=10, route="iv", blq="drop")).n_obs == 1

    def test_subject_with_only_dropped_values_is_skipped(self, tmp_path):
        path = write(tmp_path, "subject,time,conc\n1,1,2.0\n2,1,BLQ\n2,2,ND\n")
        study = read_study(path, dose=10, route="iv", blq="drop")
        assert study.ids == ("1",)
        assert study.skipped == ("subject 2: all 2 observations were below the LLOQ and dropped (blq='drop')",)

    def test_unknown_mode(self, tmp_path):
        from compartments.errors import UsageError

        with pytest.raises(UsageError, match="censor, drop, half"):
            read_study(write(tmp_path, self.FILE), dose=10, route="iv", blq="zero")


class TestTimes:
    def test_header_minutes_converted_to_hours(self, tmp_path):
        """`time [min]`: 90 min = 1.5 h; header unit stripped from the role name."""
        path = write(tmp_path, "subject,time [min],conc (mg/L)\n1,30,2\n1,90,1\n")
        study = read_study(path, dose=10, route="iv")
        assert one(study).times.tolist() == [0.5, 1.5]
        assert study.units["value"] == "mg/L" and study.units["time"] == "min"
        assert study.time_unit == "h"
        assert any("converted from min to h" in n.reason for n in study.notes)

    @pytest.mark.parametrize("unit,factor", [("h", 1.0), ("min", 1 / 60), ("s", 1 / 3600), ("day", 24.0), ("week", 168.0)])
    def test_time_unit_option(self, tmp_path, unit, factor):
        """Hours per unit: 1 min = 1/60 h, 1 s = 1/3600 h, 1 day = 24 h, 1 week = 168 h (SI / common practice)."""
        path = write(tmp_path, "subject,time,conc\n1,3,2\n")
        assert one(read_study(path, dose=1, route="iv", time_unit=unit)).times[0] == pytest.approx(3 * factor, rel=1e-15)

    def test_time_axis_in_days(self, tmp_path):
        """A biology study read onto a day axis: 36 h = 1.5 day; doses, durations and rates follow."""
        path = write(tmp_path, "id,time,count,dose,route,duration,rate\n1,0,,100,infusion,12,\n1,36,5,,,,\n2,0,,100,infusion,,10\n2,48,4,,,,\n")
        study = read_study(path, time_unit="h", time_axis="day")
        assert study.time_unit == "day"
        assert study["1"].times.tolist() == [1.5]
        assert study["1"].doses[0].duration == 0.5  # 12 h = 0.5 day
        assert study["2"].doses[0].rate == 240.0  # 10 per h = 240 per day

    def test_in_time_unit_round_trip(self, tmp_path):
        path = write(tmp_path, "id,time,conc,dose,route,rate\n1,0,,100,infusion,50\n1,3,2,,,\n")
        study = read_study(path)
        minutes = study.in_time_unit("min")
        assert minutes["1"].times.tolist() == [180.0]
        assert minutes["1"].doses[0].rate == pytest.approx(50 / 60)
        back = minutes.in_time_unit("h")
        assert back["1"].times.tolist() == [3.0] and back["1"].doses[0].rate == pytest.approx(50.0)

    def test_unstated_unit_is_noted(self, tmp_path):
        study = read_study(write(tmp_path, "id,time,conc\n1,1,2\n"), dose=1, route="iv")
        assert any(n.action == "supplied" and "hours assumed" in n.reason for n in study.notes)

    def test_clock_times(self, tmp_path):
        """ISO date-times become hours since each subject's first record; the origin is noted."""
        text = (
            "id,time,conc,dose\n"
            "A,2024-03-01 08:00,,100\n"
            "A,2024-03-01T09:30,4.0,\n"
            "A,2024-03-02 08:00,1.0,\n"
            "B,2024-03-05 22:00,0,\n"  # pre-dose sample first: origin is this sample
            "B,2024-03-05 23:00,,100\n"
            "B,2024-03-06 01:00,3.0,\n"
        )
        study = read_study(write(tmp_path, text), route="oral")
        assert study["A"].times.tolist() == [1.5, 24.0]
        assert [d.time for d in study["A"].doses] == [0.0]
        assert study["B"].times.tolist() == [0.0, 3.0]
        assert [d.time for d in study["B"].doses] == [1.0]
        origins = [n.reason for n in study.notes if "date-times" in n.reason]
        assert origins == [
            "subject A: date-times converted to h since its first dose, 2024-03-01 08:00:00",
            "subject B: date-times converted to h since its first record (a sample before the first dose), "
            "2024-03-05 22:00:00",
        ]
        assert study.settings["source_time_unit"] == "clock"

    def test_clock_times_from_a_workbook(self, tmp_path):
        path = tmp_path / "clock.xlsx"
        pd.DataFrame({
            "id": [1, 1, 1],
            "time": pd.to_datetime(["2024-01-01 08:00", "2024-01-01 08:30", "2024-01-01 10:00"]),
            "conc": [None, 5.0, 2.0],
            "dose": [10.0, None, None],
        }).to_excel(path, index=False)
        assert one(read_study(path, route="iv")).times.tolist() == [0.5, 2.0]


class TestOrder:
    TEXT = "subject,time,conc\n1,0.5,4\n1,1,3\n1,2,2\n2,0.5,8\n2,1,6\n"

    def test_unsorted_rows_are_sorted_stably(self, tmp_path):
        """Shuffled rows give the same subjects; a note says rows were sorted."""
        shuffled = "subject,time,conc\n2,1,6\n1,2,2\n1,0.5,4\n2,0.5,8\n1,1,3\n"
        a = read_study(write(tmp_path, self.TEXT, "a.csv"), dose=1, route="iv")
        b = read_study(write(tmp_path, shuffled, "b.csv"), dose=1, route="iv")
        assert b.ids == ("2", "1")  # order of first appearance
        for s in a:
            assert b[s.id].times.tolist() == s.times.tolist()
            assert b[s.id].values.tolist() == s.values.tolist()
        assert b["1"].rows.tolist() == [4, 6, 3]
        assert not any("sorted" in n.reason for n in a.notes)
        assert any(n.action == "changed" and "sorted" in n.reason for n in b.notes)

    def test_replicates_kept_in_file_order(self, tmp_path):
        path = write(tmp_path, "subject,time,conc\n1,2,5.1\n1,1,7\n1,2,4.9\n")
        s = one(read_study(path, dose=1, route="iv"))
        assert s.times.tolist() == [1.0, 2.0, 2.0]
        assert s.values.tolist() == [7.0, 5.1, 4.9]
        assert "rows 2 and 4: 2 replicate samples at time 2 kept" in s.flags

    def test_predose_nonzero_flagged_zero_not(self, tmp_path):
        path = write(tmp_path, "subject,time,conc\n1,0,0.7\n1,1,3\n2,0,0\n2,1,3\n")
        study = read_study(path, dose=1, route="oral")
        assert study["1"].flags == ("row 2: pre-dose sample with nonzero value 0.7 kept",)
        assert study["2"].flags == ()


class TestFormats:
    ROWS = [("1", 0.5, 2.5), ("1", 1.0, 1.5), ("2", 0.5, 3.0)]

    def expect(self, study):
        assert study.ids == ("1", "2")
        assert study["1"].times.tolist() == [0.5, 1.0] and study["1"].values.tolist() == [2.5, 1.5]
        assert study["2"].values.tolist() == [3.0]

    def text(self, sep):
        return "\n".join([sep.join(["subject", "time", "conc"])] + [sep.join(map(str, r)) for r in self.ROWS]) + "\n"

    @pytest.mark.parametrize("name,sep", [("s.csv", ","), ("s.tsv", "\t"), ("s.tab", "\t"), ("s.txt", ";"), ("s.txt", "\t"), ("s.csv", ";")])
    def test_delimited(self, tmp_path, name, sep):
        self.expect(read_study(write(tmp_path, self.text(sep), name), dose=1, route="iv"))

    def test_utf8_bom_and_crlf(self, tmp_path):
        path = write(tmp_path, "\ufeff" + self.text(",").replace("\n", "\r\n"))
        self.expect(read_study(path, dose=1, route="iv"))

    def test_utf16(self, tmp_path):
        self.expect(read_study(write(tmp_path, self.text("\t"), "s.txt", encoding="utf-16"), dose=1, route="iv"))

    def test_latin1_is_read_with_a_note(self, tmp_path):
        text = self.text(",").replace("subject,time,conc", "subject,time,conc,centre") .replace("\n1,", "\n1,")
        lines = text.splitlines()
        lines = [lines[0]] + [ln + ",Zürich" for ln in lines[1:]]
        study = read_study(write(tmp_path, "\n".join(lines) + "\n", encoding="latin-1"), dose=1, route="iv")
        self.expect(study)
        assert study["1"].covariates["centre"] == "Zürich"
        assert any(n.action == "flagged" and "Latin-1" in n.reason for n in study.notes)

    def test_xlsx_with_sheet(self, tmp_path):
        path = tmp_path / "s.xlsx"
        frame = pd.DataFrame(self.ROWS, columns=["subject", "time", "conc"])
        with pd.ExcelWriter(path) as xl:
            pd.DataFrame({"x": [1]}).to_excel(xl, sheet_name="readme", index=False)
            frame.to_excel(xl, sheet_name="plasma", index=False)
        study = read_study(path, sheet="plasma", dose=1, route="iv")
        self.expect(study)
        assert study["1"].rows.tolist() == [2, 3]  # sheet rows (header = row 1)
        assert study.sha256 is not None and study.settings["format"] == "xlsx"

    def test_xlsx_header_below_blank_rows(self, tmp_path):
        """Blank rows above the header are skipped; row numbers stay the sheet's."""
        import openpyxl

        book = openpyxl.Workbook()
        sheet = book.active
        sheet["A3"], sheet["B3"], sheet["C3"] = "subject", "time", "conc"
        for r in self.ROWS:
            sheet.append([r[0], r[1], r[2]])
        book.save(tmp_path / "s.xlsx")
        study = read_study(tmp_path / "s.xlsx", dose=1, route="iv")
        self.expect(study)
        assert study["2"].rows.tolist() == [6]

    def test_parquet(self, tmp_path):
        path = tmp_path / "s.parquet"
        pd.DataFrame(self.ROWS, columns=["subject", "time", "conc"]).to_parquet(path)
        self.expect(read_study(path, dose=1, route="iv"))

    def test_missing_markers(self, tmp_path):
        """Empty, NA, N/A and null cells are missing: such rows are dropped with a note."""
        path = write(tmp_path, "subject,time,conc\n1,0.5,2.5\n1,1,1.5\n1,2,NA\n1,3,N/A\n1,4,\n2,0.5,3\n2,1,null\n")
        study = read_study(path, dose=1, route="iv")
        self.expect(study)
        assert sorted(n.row for n in study.notes if n.action == "dropped") == [4, 5, 6, 8]

    def test_empty_rows_and_nameless_empty_column(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,\n1,0.5,2.5,\n,,,\n1,1,1.5,\n2,0.5,3,\n")
        study = read_study(path, dose=1, route="iv")
        self.expect(study)
        assert any(n.row == 3 and n.action == "dropped" for n in study.notes)


class TestColumnRoles:
    def test_plain_word_synonyms_case_insensitive(self, tmp_path):
        path = write(tmp_path, "Patient,HOURS,Level,Amount,Route\nP1,0,,5,PO\nP1,2,1.25,,\n")
        s = one(read_study(path))
        assert s.id == "P1" and s.times.tolist() == [2.0]
        assert s.doses == (Dose(0.0, 5.0, "oral"),)

    def test_mapping_dict_and_header_units(self, tmp_path):
        path = write(tmp_path, "Animal No,Hours after dose,Plasma (ng/mL)\n7,1,12\n")
        study = read_study(path, columns={"subject": "Animal No", "time": "Hours after dose", "value": "plasma"},
                           dose=1, route="iv")
        assert one(study).id == "7" and study.units["value"] == "ng/mL"
        assert study.settings["column_roles"]["value"] == "Plasma (ng/mL)"

    def test_mapping_file(self, tmp_path):
        path = write(tmp_path, "Animal No,Hours after dose,Plasma\n7,1,12\n")
        mapping = tmp_path / "map.toml"
        mapping.write_text('subject = "Animal No"\ntime = "Hours after dose"\nvalue = "Plasma"\n')
        assert one(read_study(path, columns=mapping, dose=1, route="iv")).values.tolist() == [12.0]

    def test_no_subject_column_is_one_subject(self, tmp_path):
        study = read_study(write(tmp_path, "time,conc\n1,2\n2,1\n"), dose=1, route="iv")
        assert study.ids == ("1",)
        assert any(n.action == "supplied" and "no subject column" in n.reason for n in study.notes)

    def test_observables(self, tmp_path):
        path = write(tmp_path, "id,time,conc,analyte\n1,1,2,plasma\n1,1,9,urine\n1,2,1,plasma\n")
        s = one(read_study(path, dose=1, route="iv", observables=["plasma", "urine"]))
        assert s.observables == ("plasma", "urine", "plasma")
        assert s.observed("plasma").tolist() == [True, False, True]
        assert s.observed().tolist() == [True, True, True]

    def test_route_words_and_infusions(self, tmp_path):
        text = ("id,time,conc,dose,route,duration,rate\n"
                "1,0,,100,Intravenous,,\n1,1,5,,,,\n"
                "1,12,,50,inf,2,\n1,13,4,,,,\n"
                "1,24,,60,INFUSION,,30\n1,30,2,,,,\n"
                "1,36,,10,by mouth,,\n1,40,1,,,,\n")
        doses = one(read_study(write(tmp_path, text))).doses
        assert doses == (Dose(0.0, 100.0, "iv"), Dose(12.0, 50.0, "infusion", duration=2.0),
                         Dose(24.0, 60.0, "infusion", rate=30.0), Dose(36.0, 10.0, "oral"))

    def test_infusion_duration_option(self, tmp_path):
        path = write(tmp_path, "id,time,conc,dose\n1,0,,100\n1,3,5,\n")
        (d,) = one(read_study(path, route="infusion", duration=0.5)).doses
        assert (d.route, d.duration, d.infusion_rate) == ("infusion", 0.5, 200.0)

    def test_dose_and_value_on_one_row(self, tmp_path):
        """A row with both a dose and a value is both (trough sample taken with the dose)."""
        path = write(tmp_path, "id,time,conc,dose\n1,0,,100\n1,12,3.2,100\n1,24,3.9,\n")
        s = one(read_study(path, route="iv"))
        assert [d.time for d in s.doses] == [0.0, 12.0]
        assert s.times.tolist() == [12.0, 24.0]

    def test_dose_column_option_and_dose_time(self, tmp_path):
        path = write(tmp_path, "id,time,conc,mg given\n1,1,5,320\n1,2,4,320\n2,1,6,250\n")
        study = read_study(path, dose_column="mg given", dose_time=0.25, route="oral")
        assert study["2"].doses == (Dose(0.25, 250.0, "oral"),)
        assert study["1"].covariates == {}

    def test_forced_rows_layout(self, tmp_path):
        path = write(tmp_path, "id,time,conc,dose\n1,0,1,10\n1,12,2,10\n")
        assert len(one(read_study(path, route="iv", dose_layout="rows")).doses) == 2

    def test_covariates_and_varying_columns(self, tmp_path):
        path = write(tmp_path, "id,time,conc,Wt (kg),sex,site,lab\n1,1,2,70.5,F,3,a\n1,2,1,70.5,F,,b\n2,1,3,,M,4,a\n")
        study = read_study(path, dose=1, route="iv")
        assert dict(study["1"].covariates) == {"Wt": 70.5, "sex": "F", "site": 3}
        assert dict(study["2"].covariates) == {"Wt": None, "sex": "M", "site": 4}
        assert study.units["Wt"] == "kg"
        (note,) = [n for n in study.notes if n.column == "lab"]
        assert note.action == "flagged" and "changes within subject 1" in note.reason

    def test_header_unit_conflict(self, tmp_path):
        from compartments.errors import DataError

        path = write(tmp_path, "id,time,conc (mg/L)\n1,1,2\n")
        with pytest.raises(DataError, match="'mg/L' but units= says 'ng/mL'") as err:
            read_study(path, dose=1, route="iv", units={"value": "ng/mL"})
        assert (err.value.row, err.value.column) == (1, "conc (mg/L)")
        assert read_study(path, dose=1, route="iv", units={"value": "mg/l"}).units["value"] == "mg/l"


class TestStudyObject:
    @pytest.fixture
    def study(self, tmp_path):
        path = write(tmp_path, "id,time,conc,lloq,Wt\n10,1,2,0.1,70\n10,2,BLQ,0.1,70\n11,1,3,0.1,80\n")
        return read_study(path, dose=5, route="oral", units={"dose": "mg", "value": "mg/L"})

    def test_lookup(self, study):
        assert study[10] is study["10"] and study.ids == ("10", "11")
        assert len(study) == 2 and [s.id for s in study] == ["10", "11"]
        with pytest.raises(SubjectNotFound, match="no subject '12'"):
            study[12]
        with pytest.raises(KeyError):
            study["x"]

    def test_subset(self, study):
        sub = study.subset([11])
        assert sub.ids == ("11",) and sub.source == study.source

    def test_summary(self, study):
        frame = study.summary()
        assert frame.columns.tolist() == ["subject", "n_obs", "n_doses", "n_censored", "first_time", "last_time", "Wt"]
        assert frame["n_censored"].tolist() == [1, 0] and frame["Wt"].tolist() == [70, 80]
        totals = study.summary_totals()
        assert totals["obs_per_subject"] == (1, 1.5, 2)
        assert (totals["subjects"], totals["observations"], totals["censored"], totals["doses"]) == (2, 3, 1, 2)
        assert totals["time_span"] == (1.0, 2.0) and totals["covariates"] == ["Wt"]

    def test_frozen(self, study):
        s = study["10"]
        with pytest.raises(ValueError):
            s.times[0] = 99.0
        with pytest.raises(AttributeError):
            s.id = "x"

    def test_pickle_round_trip(self, study):
        """Studies travel to worker processes: pickling keeps every field and read-only arrays."""
        import pickle

        back = pickle.loads(pickle.dumps(study))
        assert back.ids == study.ids and back.units == study.units and back.notes == study.notes
        s, b = study["10"], back["10"]
        assert b.values.tolist() == s.values.tolist() and b.covariates == s.covariates and b.doses == s.doses
        assert not b.times.flags.writeable

    def test_sha256_of_file_bytes(self, tmp_path):
        import hashlib

        path = write(tmp_path, "id,time,conc\n1,1,2\n")
        assert read_study(path, dose=1, route="iv").sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def _template(obs_unit="mg/L", time_unit="h"):
    return Template(name="one", description="", note="", kind="pk", states=(), parameters=(), equations={},
                    doses={}, observables=(Observable("conc", sp.Symbol("c"), obs_unit),), time_unit=time_unit)


def _study(dose_unit, value_unit, time_unit="h"):
    s = Subject("1", [1.0], [1.0], (None,), [False], [np.nan], [2], (Dose(0.0, 1.0, "iv"),))
    return Study((s,), units={"time": "h", "value": value_unit, "dose": dose_unit}, time_unit=time_unit,
                 dose_per_weight=dose_unit.endswith("/kg"))


class TestCheckUnits:
    """Volume = amount / concentration (unit arithmetic, common practice)."""

    def test_mg_and_mg_per_l_gives_litres(self):
        assert check_units(_study("mg", "mg/L"), _template()) == [
            "dose in mg and values in mg/L: volumes come out in L, clearances in L/h"]

    def test_per_kg_dose(self):
        """Theoph units (mg/kg, mg/L): V in L/kg, CL in L/h/kg."""
        out = check_units(_study("mg/kg", "mg/L"), _template())
        assert out == ["doses are per kg: volumes come out in L/kg, clearances in L/h/kg"]

    def test_ug_and_mcg_per_ml(self):
        """ug / (mcg/mL) = mL (1 mcg = 1 ug)."""
        assert "volumes come out in mL" in check_units(_study("ug", "mcg/mL"), _template("mcg/mL"))[0]

    def test_molar_values(self):
        """nmol / nM = nmol / (nmol/L) = L; mg against nM is mass against moles (SI: M = mol/L)."""
        assert check_units(_study("nmol", "nM"), _template("nM"))[0] == (
            "dose in nmol and values in nM: volumes come out in L, clearances in L/h")
        assert "mass against moles" in check_units(_study("mg", "nM"), _template("nM"))[0]

    def test_mg_and_mcg_per_ml_is_litres(self):
        """mg / (mcg/mL) = 1e-3 g / (1e-6 g / 1e-3 L) = 1 L exactly (Indometh: 25 mg, mcg/mL): no
        scale warning, although 1e-3 / 1e-6 · 1e-3 is not exactly 1 in floating point."""
        out = check_units(_study("mg", "mcg/mL"), _template("mcg/mL"))
        assert out == ["dose in mg and values in mcg/mL: volumes come out in L, clearances in L/h"]

    def test_scale_mismatch(self):
        """mg / (ng/mL) = 1e-3 g / (1e-9 g / 1e-3 L) = 1000 L."""
        out = check_units(_study("mg", "ng/mL"), _template("ng/mL"))
        assert "volumes come out in kL, clearances in kL/h" in out[0] and "differ in scale" in out[1]

    def test_value_unit_differs_from_template(self):
        out = check_units(_study("mg", "ng/mL"), _template("mg/L"))
        assert any("'conc' is in mg/L" in line for line in out)

    def test_time_axis_differs(self):
        out = check_units(_study("mg", "mg/L"), _template(time_unit="day"))
        assert "in_time_unit('day')" in out[0]

    def test_unknown_units(self):
        out = check_units(_study("", ""), _template())
        assert any("units={'value'" in line for line in out) and any("units={'dose'" in line for line in out)

    def test_mass_against_moles(self):
        assert "molar mass" in check_units(_study("mg", "umol/L"), _template("umol/L"))[-1]
