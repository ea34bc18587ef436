"""The rich summary of a study, rendered into a string console and compared as text."""

from __future__ import annotations

from io import StringIO

from rich.console import Console

from compartments.report.inspect import notes_list, study_summary
from compartments.study import read_study


def render(renderable, width=120):
    console = Console(file=StringIO(), width=width, color_system=None)
    console.print(renderable)
    return console.file.getvalue()


def test_theoph_summary(theoph_csv):
    """Totals and one row per subject for Theoph (12 subjects, 132 samples; R ?Theoph)."""
    study = read_study(theoph_csv, route="oral", units={"dose": "mg/kg", "value": "mg/L"})
    text = render(study_summary(study))
    assert "132 (11–11 per subject, median 11)" in text
    assert "12 (per kg of body weight)" in text
    assert "0 to 24.65 h" in text  # last sample of ?Theoph: 24.65 h (subject 6)
    assert "per-subject" in text and "Wt" in text
    assert "pre-dose sample" in text
    subject_lines = [ln for ln in text.splitlines() if ln.strip().startswith("│ 1 ") or ln.strip().startswith("| 1 ")]
    assert len(subject_lines) >= 1


def test_notes_are_cut_with_a_count(tmp_path):
    lines = "\n".join(f"1,{i},BLQ,0.1" for i in range(1, 31))
    path = tmp_path / "s.csv"
    path.write_text("id,time,conc,lloq\n1,0.5,3,0.1\n" + lines + "\n")
    study = read_study(path, dose=1, route="iv")
    text = render(notes_list(study, limit=20))
    assert f"Read notes ({len(study.notes)})" in text
    assert f"… and {len(study.notes) - 20} more" in text
    assert text.count("• ") == 20


def test_skipped_subjects_listed(tmp_path):
    path = tmp_path / "s.csv"
    path.write_text("id,time,conc,dose\n1,0,,5\n1,1,2,\n2,0,,5\n")
    text = render(study_summary(read_study(path, route="iv")))
    assert "Skipped subjects (1)" in text and "subject 2: no observations (1 doses)" in text
