"""The demo: invented data files that the seeded generator reproduces, and that read as intended.

The demo data are invented (demo/README.md says so); these checks make sure the committed
files are exactly what ``demo/make_data.py`` writes, and that they have the design the demo
promises (twelve animals with 5–9 irregular draws each and a few values below the LLOQ; a
count series where only some species are counted on some days).
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest

from compartments.study import read_study

DEMO = Path(__file__).resolve().parent.parent / "demo"


def load(name: str):
    spec = importlib.util.spec_from_file_location(f"demo_{name}", DEMO / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)  # type: ignore[union-attr]
    return module


def test_generator_reproduces_committed_files(tmp_path: Path) -> None:
    """Running the seeded generator again writes byte-identical files."""
    paths = load("make_data").generate(tmp_path)
    for p in paths:
        assert p.read_bytes() == (DEMO / p.name).read_bytes(), p.name


def test_labelled_invented() -> None:
    """The companion README and the demo's report titles say the data are invented."""
    readme = (DEMO / "README.md").read_text(encoding="utf-8")
    assert "INVENTED" in readme and "No animal, greenhouse, survey or compound here is real" in " ".join(readme.split())
    demo = load("run_demo")
    assert demo.PK_TITLE.startswith("INVENTED DATA") and demo.COUNTS_TITLE.startswith("INVENTED DATA")


def test_rabbit_study_design() -> None:
    """Twelve animals, 5–9 draws each at irregular times, a few values below the LLOQ, one oral dose."""
    study = read_study(DEMO / "vx17_rabbits.csv", route="oral")
    assert len(study) == 12
    counts = [s.n_obs for s in study]
    assert min(counts) >= 5 and max(counts) <= 9
    assert 3 <= sum(s.n_censored for s in study) <= 10
    assert all(len(s.doses) == 1 and s.doses[0].route == "oral" and s.doses[0].amount == 30 for s in study)
    assert len({tuple(s.times) for s in study}) == 12  # no two animals share a schedule
    assert np.allclose(np.concatenate([s.lloq[s.censored] for s in study]), 0.05)
    assert study.units["value"] == "mg/L" and set(study.covariate_names) >= {"sex", "weight"}


def test_count_series_design() -> None:
    """Long layout in days; prey counted on every visit, predators on some only."""
    study = read_study(DEMO / "greenhouse_counts.csv", columns={"subject": "greenhouse"}, time_axis="day")
    (s,) = study.subjects
    prey = {t for t, o in zip(s.times, s.observables, strict=True) if o == "prey"}
    predator = {t for t, o in zip(s.times, s.observables, strict=True) if o == "predator"}
    assert predator < prey and len(predator) < len(prey) / 1.5
    assert set(s.observables) == {"prey", "predator"} and study.time_unit == "day"
    assert s.times.max() == pytest.approx(40.0)


def test_demo_commands(monkeypatch: pytest.MonkeyPatch) -> None:
    """make demo fits the PK file with the three oral models and the counts with predator-prey, into demo/out."""
    demo = load("run_demo")
    calls: list[list[str]] = []
    monkeypatch.setattr(demo, "main", lambda args: calls.append(list(args)))
    monkeypatch.setattr(demo, "OUT", Path("/nonexistent-demo-out"))
    monkeypatch.setattr(Path, "mkdir", lambda self, *a, **k: None)
    demo.run()
    pk, counts = calls
    assert [pk[i + 1] for i, a in enumerate(pk) if a == "--model"] == ["one-comp-oral", "two-comp-oral", "transit-oral"]
    assert "--json" in pk and "--out" in pk and "--report" in pk and "--overwrite" in pk
    assert counts[counts.index("--model") + 1] == "predator-prey"
