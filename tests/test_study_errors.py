"""One test per way a study file can be unusable: a DataError naming the row and column,
what is wrong and what to do (the message shape is the project's rule for user errors)."""

from __future__ import annotations

import pandas as pd
import pytest

from compartments.errors import DataError, UsageError
from compartments.study import read_study

HEAD = "subject,time,conc"


def write(tmp_path, text, name="study.csv"):
    path = tmp_path / name
    if isinstance(text, bytes):
        path.write_bytes(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


def refuse(path, *words, row=None, column=None, **kw):
    """Read, expect a DataError with the given row, column and words; return it."""
    with pytest.raises(DataError) as err:
        read_study(path, **kw)
    e = err.value
    msg = str(e)
    assert e.row == row, msg
    assert e.column == column, msg
    for w in words:
        assert w in msg, msg
    assert "\n" not in msg  # one line
    return e


class TestFile:
    def test_missing_file(self, tmp_path):
        refuse(tmp_path / "nope.csv", "no such file", "nope.csv")

    def test_folder(self, tmp_path):
        refuse(tmp_path, "folder")

    def test_unknown_format(self, tmp_path):
        path = write(tmp_path, "{}", "study.json")
        refuse(path, "unknown file format '.json'", ".csv", "DataFrame")

    def test_not_a_path(self):
        with pytest.raises(DataError, match="file path or a pandas DataFrame"):
            read_study(42)

    def test_empty_file(self, tmp_path):
        refuse(write(tmp_path, ""), "empty")
        refuse(write(tmp_path, "\n \n"), "empty")

    def test_header_only(self, tmp_path):
        refuse(write(tmp_path, HEAD + "\n"), "header", "no data rows", "'conc'")

    def test_binary_garbage(self, tmp_path):
        refuse(write(tmp_path, bytes(range(256)) * 4), "binary", "CSV")

    def test_workbook_under_a_csv_name(self, tmp_path):
        refuse(write(tmp_path, b"PK\x03\x04rest-of-zip"), "Excel workbook", ".xlsx")

    def test_damaged_workbook(self, tmp_path):
        refuse(write(tmp_path, b"not a zip at all", "study.xlsx"), "cannot be opened")

    def test_missing_sheet_lists_sheets(self, tmp_path):
        path = tmp_path / "study.xlsx"
        with pd.ExcelWriter(path) as xl:
            pd.DataFrame({"subject": [1], "time": [1.0], "conc": [2.0]}).to_excel(xl, sheet_name="plasma", index=False)
            pd.DataFrame({"a": [1]}).to_excel(xl, sheet_name="notes", index=False)
        refuse(path, "no sheet 'urine'", "'plasma', 'notes'", sheet="urine", dose=1, route="iv")
        refuse(path, "no sheet number 5", sheet=5, dose=1, route="iv")

    def test_ragged_row(self, tmp_path):
        refuse(write(tmp_path, HEAD + "\n1,0.5,2\n1,1,3,99\n"), "4 fields", "header has 3", row=3)

    def test_duplicated_header(self, tmp_path):
        refuse(write(tmp_path, "subject,time,conc,conc\n1,1,2,3\n"), "names 'conc' twice", "distinct", row=1, column="conc")


class TestColumns:
    def test_missing_required_column(self, tmp_path):
        e = refuse(write(tmp_path, "subject,hours_after,conc\n1,1,2\n"), "no column for the time",
                   "'subject', 'hours_after', 'conc'", "columns={'time': 'COLUMN'}", "--map time=COLUMN", row=1)
        assert e.path.endswith("study.csv")

    def test_mapping_names_missing_column(self, tmp_path):
        path = write(tmp_path, HEAD + "\n1,1,2\n")
        refuse(path, "names 'Plasma' for the value", "columns found: 'subject', 'time', 'conc'",
               row=1, column="Plasma", columns={"value": "Plasma"}, dose=1, route="iv")

    def test_two_columns_for_one_role(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,value\n1,1,2,3\n")
        refuse(path, "'conc' and 'value' could each be the value", "--map value=", row=1, column="value")

    def test_unknown_role_in_mapping(self, tmp_path):
        with pytest.raises(UsageError, match="unknown column role 'dv'"):
            read_study(write(tmp_path, HEAD + "\n1,1,2\n"), columns={"dv": "conc"})


class TestCells:
    def test_non_numeric_value(self, tmp_path):
        path = write(tmp_path, HEAD + "\n1,0.5,2.1\n1,1,abc\n")
        refuse(path, "'abc' is not a number", "<0.1", row=3, column="conc", dose=1, route="iv")

    def test_many_rows_in_one_message(self, tmp_path):
        """Many rows sharing a problem: the first five and a count of the rest."""
        lines = [f"1,{i},{'x' if i % 2 else 1}" for i in range(1, 80)]
        path = write(tmp_path, HEAD + "\n" + "\n".join(lines) + "\n")
        e = refuse(path, "rows 2, 4, 6, 8, 10 and 35 more", row=2, column="conc", dose=1, route="iv")
        assert "'x' is not a number" in str(e)

    def test_negative_time(self, tmp_path):
        path = write(tmp_path, HEAD + "\n1,0.5,2\n1,-2.5,3\n")
        refuse(path, "'-2.5' is negative", "0 or more", row=3, column="time", dose=1, route="iv")

    def test_missing_time(self, tmp_path):
        path = write(tmp_path, HEAD + "\n1,0.5,2\n1,,3\n")
        refuse(path, "the time is missing", row=3, column="time", dose=1, route="iv")

    def test_non_numeric_time(self, tmp_path):
        path = write(tmp_path, HEAD + "\n1,0.5,2\n1,later,3\n")
        refuse(path, "'later' is not a number", "ISO date-time", row=3, column="time", dose=1, route="iv")

    def test_numbers_mixed_with_date_times(self, tmp_path):
        path = write(tmp_path, HEAD + "\n1,2024-01-01 08:00,2\n1,1.5,3\n")
        refuse(path, "'1.5' is a number but other rows have date-times", row=3, column="time", dose=1, route="iv")

    def test_mixed_time_zones(self, tmp_path):
        path = write(tmp_path, HEAD + "\n1,2024-01-01 08:00,2\n1,2024-01-01T09:00Z,3\n")
        refuse(path, "time-zone", row=3, column="time", dose=1, route="iv")

    def test_negative_concentration(self, tmp_path):
        path = write(tmp_path, HEAD + "\n1,0.5,2\n1,1,-0.3\n")
        refuse(path, "'-0.3' is negative", row=3, column="conc", dose=1, route="iv")

    @pytest.mark.parametrize("text", ["nan", "NaN", "inf", "-Infinity"])
    def test_not_finite_value(self, tmp_path, text):
        path = write(tmp_path, HEAD + f"\n1,0.5,2\n1,1,{text}\n")
        refuse(path, "not a finite number", "empty", row=3, column="conc", dose=1, route="iv")

    def test_inf_in_a_dataframe(self):
        frame = pd.DataFrame({"subject": [1, 1], "time": [0.5, 1.0], "conc": [2.0, float("inf")]})
        refuse(frame, "not a finite number", row=3, column="conc", dose=1, route="iv")

    def test_missing_subject(self, tmp_path):
        path = write(tmp_path, HEAD + "\n1,0.5,2\n,1,3\n")
        refuse(path, "subject is missing", row=3, column="subject", dose=1, route="iv")

    def test_blq_word_without_limit(self, tmp_path):
        path = write(tmp_path, HEAD + "\n1,0.5,2\n1,8,BLQ\n")
        refuse(path, "'BLQ' is below the limit", "add an lloq column", row=3, column="conc", dose=1, route="iv")

    def test_observable_not_allowed(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,analyte\n1,0.5,2,plasma\n1,1,3,urine\n")
        refuse(path, "observable 'urine' is not one of 'plasma'", row=3, column="analyte",
               dose=1, route="iv", observables=["plasma"])


class TestDoses:
    def test_dose_without_amount(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,dose,route\n1,0,,100,iv\n1,1,3,,\n1,12,,,iv\n")
        refuse(path, "describes a dose", "no dose amount", "column 'dose'", row=4, column="dose")

    def test_unknown_route(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,dose,route\n1,0,,100,nasal\n1,1,3,,\n")
        refuse(path, "'nasal' is not a route", "oral", row=2, column="route")

    def test_unknown_route_option(self, tmp_path):
        with pytest.raises(UsageError, match="route='nasal'"):
            read_study(write(tmp_path, HEAD + "\n1,1,2\n"), dose=1, route="nasal")

    def test_duplicated_dose(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,dose\n1,0,,100\n1,1,3,\n1,0,,50\n")
        refuse(path, "second dose for the same subject at the same time as row 2", row=4, column="dose", route="iv")

    def test_infusion_without_rate_or_duration(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,dose,route\n1,0,,100,infusion\n1,1,3,,\n")
        refuse(path, "neither a duration nor a rate", "duration=", row=2, column="route")

    def test_no_route_known_is_resolved_by_the_model(self, tmp_path):
        """A dose row without a route: kept as 'auto' with a note; a model with two bolus
        routes then refuses it with the fix (see test_dosing)."""
        path = write(tmp_path, "subject,time,conc,dose\n1,0,,100\n1,1,3,\n")
        study = read_study(path)
        assert study["1"].doses[0].route == "auto"
        assert any("--route" in n.reason for n in study.notes)

    def test_negative_dose(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,dose\n1,0,,-100\n1,1,3,\n")
        refuse(path, "'-100' is negative", row=2, column="dose", route="iv")

    def test_per_subject_dose_changes(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,Dose\n1,0.5,2,4\n1,1,3,5\n")
        refuse(path, "changes within subject 1", "dose_layout='rows'", row=3, column="Dose", route="oral")
        refuse(path, "per-subject dose changes within subject 1", row=3, column="Dose", route="oral", dose_column="Dose")

    def test_dose_option_and_dose_column(self, tmp_path):
        with pytest.raises(UsageError, match="has a dose column 'dose'"):
            read_study(write(tmp_path, "subject,time,conc,dose\n1,0,,1\n1,1,2,\n"), dose=5, route="iv")

    def test_no_usable_observation_at_all(self, tmp_path):
        path = write(tmp_path, "subject,time,conc,dose\n1,0,,100\n2,0,,100\n")
        refuse(path, "no subject has a usable observation", "subject 1: no observations", route="iv")
