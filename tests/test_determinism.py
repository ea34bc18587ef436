"""Same seed, same numbers: runs repeated, in a process pool, and with other thread settings.

The JSON documents of two runs must be identical except for the fields that record *when*
and *how long* (found by comparing two runs field by field) and, across execution
settings, the fields that record those settings:

* ``created`` — time stamp of the document;
* ``fits[].wall_time`` and ``fits[].stages[].wall_time`` — durations in seconds;
* ``settings.workers``, ``settings.execution`` — how the run was executed (only when
  comparing different ``--workers``);
* ``settings.fit_options`` — the network-stage options given (only when comparing
  thread settings).

Everything else — estimates, standard errors, intervals, objective, AIC, warnings, stage
messages and iteration counts, comparisons, NCA — must be equal, bit for bit (JSON floats
are written with ``repr``, which round-trips exactly).
"""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

import pytest

import compartments.estimate.pinn as pinn
from compartments.cli import main
from compartments.cohort import run_cohort
from compartments.report.export import run_document
from compartments.study import read_study

ROWS = (
    "subject,time,conc\n"
    "1,0.5,3.1\n1,1,4.6\n1,2,4.2\n1,4,3.0\n1,8,1.6\n1,12,0.8\n"
    "2,0.5,2.2\n2,1,3.9\n2,2,4.4\n2,4,3.4\n2,8,2.0\n2,12,1.1\n"
)
TIMES = ("created",)
DURATIONS = ("wall_time",)


def strip(doc: dict[str, Any], *settings: str) -> dict[str, Any]:
    """The document without time stamps, durations and the named settings."""
    doc = copy.deepcopy(doc)
    for key in TIMES:
        doc.pop(key)
    for f in doc["fits"]:
        for key in DURATIONS:
            f.pop(key)
        for s in f["stages"]:
            s.pop("wall_time")
    for key in settings:
        doc["settings"].pop(key)
    return doc


def fit_json(data: Path, js: Path, *extra: str) -> dict[str, Any]:
    argv = ["fit", str(data), "--model", "one-comp-oral,two-comp-oral", "--dose", "100", "--route", "oral",
            "--strategy", "hybrid", "--seed", "5", "--quiet", "--json", str(js), *extra]
    try:
        main(argv)
    except SystemExit as exc:
        assert exc.code in (0, None), exc.code
    return json.loads(js.read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("determinism") / "study.csv"
    path.write_text(ROWS, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def serial(data: Path) -> dict[str, Any]:
    """The reference run: hybrid strategy (network stage included), one process."""
    return fit_json(data, data.with_name("serial.json"), "--workers", "1")


class TestSameSeedSameNumbers:
    def test_reference_run_has_numbers(self, serial: dict[str, Any]) -> None:
        """The comparisons below compare real fits, not empty documents."""
        assert len(serial["fits"]) == 4 and all(f["status"] == "ok" for f in serial["fits"])
        assert all(f["stages"][0]["name"] == "network" for f in serial["fits"])
        assert len(serial["comparison"]) == 2

    def test_run_twice(self, data: Path, serial: dict[str, Any]) -> None:
        """The same command twice gives the same document, times aside."""
        again = fit_json(data, data.with_name("again.json"), "--workers", "1")
        assert again["created"] and again["fits"][0]["wall_time"] >= 0
        assert strip(again) == strip(serial)

    def test_process_pool(self, data: Path, serial: dict[str, Any]) -> None:
        """--workers 2 (a process pool, one thread per worker) gives the serial run's numbers."""
        pooled = fit_json(data, data.with_name("pool.json"), "--workers", "2")
        assert pooled["settings"]["execution"] == "processes" and pooled["settings"]["workers"] == 2
        assert strip(pooled, "workers", "execution") == strip(serial, "workers", "execution")

    def test_other_seed_is_recorded(self, data: Path, serial: dict[str, Any]) -> None:
        """The seed is part of what is compared: another --seed gives other per-fit seeds in the JSON."""
        other = fit_json(data, data.with_name("seed6.json"), "--workers", "1", "--seed", "6")
        assert [f["seed"] for f in other["fits"]] != [f["seed"] for f in serial["fits"]]
        assert other["settings"]["seed"] == 6


class TestNetworkThreads:
    """The command line has no thread option; the network stage takes ``threads`` through the API
    (``fit(..., network={"threads": n})``, here via ``run_cohort(fit_options=...)``)."""

    def test_threads_do_not_change_the_numbers(self, data: Path, monkeypatch: pytest.MonkeyPatch) -> None:
        used: list[int] = []
        real = pinn._limited_threads

        def recording(n: int):  # noqa: ANN202
            used.append(int(n))
            return real(n)

        monkeypatch.setattr(pinn, "_limited_threads", recording)
        study = read_study(data, dose=100, route="oral")
        docs = {}
        for threads in (1, 2):
            cohort = run_cohort(study, ["two-comp-oral"], strategy="hybrid", seed=5, workers=1,
                                fit_options={"network": {"threads": threads}})
            docs[threads] = run_document(cohort, study, dict(cohort.settings), created="fixed")
        assert sorted(set(used)) == [1, 2]  # the setting reached the stage
        assert docs[1]["settings"]["fit_options"] != docs[2]["settings"]["fit_options"]
        assert strip(docs[1], "fit_options") == strip(docs[2], "fit_options")
        assert all(f["status"] == "ok" for f in docs[1]["fits"])
