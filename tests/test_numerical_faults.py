"""Numerical faults: extreme bounds, stiffness, overflow, a failing integrator, too few data.

The rule (issue 7): such a fit ends with status ``"failed"`` and the reason, or ``"ok"``
with a warning that says what to do; the run never crashes, and a number that is not
finite is never shown as an estimate without a warning. Each case runs through the
command line and checks the terminal report and the JSON document together
(:func:`check_report`).

Data are invented and generated here (one-compartment and Michaelis–Menten solutions
computed with the package's simulator, predator–prey counts growing as 10·e^{6t}).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest
from cli_run import run

import compartments.engine.ode as ode_module
from compartments import Dose, fit, load_template, read_study
from compartments.model import compiled
from compartments.simulate import simulate

TIMES = np.array([0.25, 0.5, 1, 2, 4, 6, 8, 12, 24.0])
NONFINITE_WORDS = re.compile(r"\b(nan|NaN|NAN|inf|Inf|INF|Infinity|infinity)\b")



def flat(text: str) -> str:
    """Report text without box lines and line breaks, for phrase checks."""
    return " ".join(re.sub(r"[│╭╮╰╯─┃━]", " ", text).split())


def check_report(doc: dict, text: str) -> None:
    """No silent non-finite numbers: the shared check of every case here.

    * an ok fit has finite estimates for every parameter;
    * a standard error, %RSE, interval or derived value that is not finite (null in
      the JSON, "—" or "∞" on screen) comes with at least one warning;
    * every warning and every failure reason is printed in the report;
    * the words nan / inf never appear on screen.
    """
    shown = flat(text)
    assert not NONFINITE_WORDS.search(text), NONFINITE_WORDS.search(text)
    for f in doc["fits"]:
        where = f"{f['subject']} × {f['model']}"
        if f["status"] == "failed":
            assert f["message"], where
            assert flat(f["message"])[:60] in shown, (where, f["message"])
            continue
        assert f["status"] == "ok", where
        for name, p in f["parameters"].items():
            assert isinstance(p["estimate"], float) and np.isfinite(p["estimate"]), (where, name, p)
        missing = [n for n, p in f["parameters"].items()
                   if p["se"] is None or p["rse"] is None or None in p["ci95"]]
        missing += [n for n, d in f["derived"].items() if d["value"] is None]
        if missing:
            assert f["warnings"], (where, missing)
        for w in f["warnings"]:
            assert flat(w)[:60] in shown, (where, w)


def fit_cli(tmp: Path, rows: str, *args: object, capfd: pytest.CaptureFixture[str]) -> tuple[int, dict, str]:
    data = tmp / "study.csv"
    data.write_text(rows, encoding="utf-8")
    js = tmp / "run.json"
    capfd.readouterr()
    code = run(["fit", data, "--json", js, "--workers", "1", *args])
    out, err = capfd.readouterr()
    assert "Traceback" not in out + err
    doc = json.loads(js.read_text(encoding="utf-8"))
    check_report(doc, out)
    return code, doc, out


def csv_rows(times: np.ndarray, values: np.ndarray, subject: str = "1") -> str:
    return "".join(f"{subject},{t:g},{v:.6g}\n" for t, v in zip(times, values, strict=True))


class TestBounds:
    def test_estimate_at_a_bound_is_flagged(self, tmp_path: Path, capfd) -> None:
        """A concentration that does not fall over 24 h drives ke to its lower bound (0.001 1/h):
        the fit is ok, and the report and JSON say so with what to do."""
        values = 4.0 + 0.01 * (np.arange(TIMES.size) % 2)
        code, doc, out = fit_cli(tmp_path, "subject,time,conc\n" + csv_rows(TIMES, values),
                                 "--model", "one-comp-oral", "--dose", "100", "--route", "oral",
                                 "--strategy", "nls", capfd=capfd)
        assert code == 0
        (f,) = doc["fits"]
        assert f["parameters"]["ke"]["estimate"] == pytest.approx(0.001, rel=1e-6)
        warning = next(w for w in f["warnings"] if w.startswith("ke is at its lower bound"))
        assert "widen the bounds" in warning and warning[:40] in flat(out)


class TestStiff:
    def test_michaelis_menten_with_tiny_km(self, tmp_path: Path, capfd) -> None:
        """Km = 0.002 mg/L against concentrations near 25 mg/L: elimination is zero order almost to
        the end and switches within minutes (a stiff corner). The fit runs; Km cannot be
        determined, and the report says so instead of printing a bare number."""
        m = compiled(load_template("one-comp-mm"))
        y = simulate(m, {"Vmax": 50.0, "Km": 0.002, "V": 40.0}, [Dose(0, 1000, "iv")], TIMES).observable()
        y = np.maximum(y * (1 + 0.05 * np.random.default_rng(0).standard_normal(TIMES.size)), 0.01)
        code, doc, _ = fit_cli(tmp_path, "subject,time,conc\n" + csv_rows(TIMES, y), "--model", "one-comp-mm",
                               "--dose", "1000", "--route", "iv", "--strategy", "nls", capfd=capfd)
        (f,) = doc["fits"]
        assert code == 0 and f["status"] == "ok"
        # the linear-phase parameters are found (zero-order slope Vmax/V, volume from the start)
        assert f["parameters"]["V"]["estimate"] == pytest.approx(40.0, rel=0.05)
        assert any(w.startswith("Km is poorly determined") for w in f["warnings"])


class TestOverflow:
    def test_exploding_counts(self, tmp_path: Path, capfd) -> None:
        """Prey counts growing as 10·e^{6t} (to 2.6e11 by day 4) with predators dying out: trial
        parameters overflow the integrator; the fit still ends, with warnings where the data
        cannot identify the parameters, never with a non-finite number shown bare."""
        rows = ["greenhouse,time (day),observable,count"]
        for t in range(5):
            rows += [f"A,{t},prey,{10 * np.exp(6.0 * t):.6g}", f"A,{t},predator,{5 * np.exp(-2.0 * t):.6g}"]
        code, doc, _ = fit_cli(tmp_path, "\n".join(rows) + "\n", "--model", "predator-prey", "--strategy", "nls",
                               capfd=capfd)
        (f,) = doc["fits"]
        assert code in (0, 3)
        assert f["status"] == "failed" or f["warnings"]

    def test_simulation_that_blows_up(self, capfd) -> None:
        """Prey growing at 100/day, barely eaten, feeding no predators: the integrator stops with one
        line (exit 2), not a hang or an overflow trace."""
        code = run(["simulate", "predator-prey", "--param", "alpha=100", "--param", "beta=0.00001",
                    "--param", "delta=0.00001", "--times", "0:30:1"])
        out, err = capfd.readouterr()
        lines = [ln for ln in err.splitlines() if ln.strip()]
        assert code == 2 and len(lines) == 1 and "Traceback" not in out + err
        assert "predator-prey" in lines[0] and ("without bound" in lines[0] or "non-finite" in lines[0])


def _broken_solver(monkeypatch: pytest.MonkeyPatch) -> None:
    """The ODE integrator reports failure on every call (as LSODA does when the step underflows)."""
    real = ode_module.odeint

    def failing(*args, **kwargs):  # noqa: ANN002, ANN003, ANN202
        y, info = real(*args, **kwargs)
        info["message"] = "step size became too small (simulated failure)"
        return y, info

    monkeypatch.setattr(ode_module, "odeint", failing)


IV_ROWS = "subject,time,conc\n" + csv_rows(TIMES, 25.0 * np.exp(-0.15 * TIMES))


class TestFailingIntegrator:
    def test_failed_with_the_reason_others_fitted(self, tmp_path: Path, capfd,
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
        """one-comp-mm needs the ODE integrator, which fails: that fit is failed with the integrator's
        reason and the remedy; one-comp-iv (matrix exponential) is fitted; exit code 3."""
        _broken_solver(monkeypatch)
        code, doc, out = fit_cli(tmp_path, IV_ROWS, "--model", "one-comp-iv,one-comp-mm", "--dose", "100",
                                 "--route", "iv", "--strategy", "nls", capfd=capfd)
        assert code == 3
        fits = {f["model"]: f for f in doc["fits"]}
        assert fits["one-comp-iv"]["status"] == "ok"
        failed = fits["one-comp-mm"]
        assert failed["status"] == "failed" and failed["parameters"] == {}
        assert "the integrator failed for 'one-comp-mm'" in failed["message"]
        assert "simulated failure" in failed["message"] and "the parameters may be extreme" in failed["message"]
        assert doc["comparison"][0]["preferred"] == "one-comp-iv"
        assert "one-comp-mm" in doc["comparison"][0]["failed"]

    def test_unexpected_exception_is_isolated(self, tmp_path: Path, capfd,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
        """An exception nobody planned for inside the integrator fails that fit only, with its type and
        message; the run goes on and reports (exit 3), with no traceback."""

        def boom(*args, **kwargs):  # noqa: ANN002, ANN003, ANN202
            raise RuntimeError("boom inside the integrator")

        monkeypatch.setattr(ode_module, "odeint", boom)
        code, doc, _ = fit_cli(tmp_path, IV_ROWS, "--model", "one-comp-iv,one-comp-mm", "--dose", "100",
                               "--route", "iv", "--strategy", "nls", capfd=capfd)
        assert code == 3
        fits = {f["model"]: f for f in doc["fits"]}
        assert fits["one-comp-iv"]["status"] == "ok"
        assert fits["one-comp-mm"]["status"] == "failed"
        assert "RuntimeError: boom inside the integrator" in fits["one-comp-mm"]["message"]

    @pytest.mark.parametrize("strategy", ["hybrid", "network"])
    def test_every_strategy_fails_cleanly(self, strategy: str, monkeypatch: pytest.MonkeyPatch) -> None:
        """With the network stage in front, the result is still a failed fit with a reason, not an exception."""
        _broken_solver(monkeypatch)
        subject = read_study(IV_ROWS_FRAME(), dose=100, route="iv")["1"]
        r = fit(subject, "one-comp-mm", strategy=strategy, network={"max_time": 2.0})
        assert r.status == "failed" and r.message
        assert r.estimates == {}
        if strategy == "hybrid":
            assert "integrator failed" in r.message


def IV_ROWS_FRAME():  # noqa: N802 - a constant built on demand
    import io

    import pandas as pd

    return pd.read_csv(io.StringIO(IV_ROWS))


class TestTooFewObservations:
    def test_refused_for_one_model_fitted_with_the_other(self, tmp_path: Path, capfd) -> None:
        """Subject b has three samples: enough for one-comp-oral (3 parameters), not for two-comp-oral
        (5): that pair is failed with the reason, b is fitted and compared with the other model,
        and subject a is fitted with both (exit 3: some fits failed)."""
        # subject a: a genuine two-compartment oral profile, so both models converge for it
        from compartments import Dose, load_template
        from compartments.model import compiled
        from compartments.simulate import simulate

        two = compiled(load_template("two-comp-oral"))
        a = simulate(two, {"ka": 1.5, "k10": 0.2, "k12": 0.4, "k21": 0.2, "V1": 10.0}, [Dose(0, 100, "oral")],
                     TIMES).observable()
        tb = np.array([1.0, 4.0, 8.0])
        b = 6 * (np.exp(-0.12 * tb) - np.exp(-1.2 * tb))
        code, doc, out = fit_cli(tmp_path, "subject,time,conc\n" + csv_rows(TIMES, a, "a") + csv_rows(tb, b, "b"),
                                 "--model", "one-comp-oral,two-comp-oral", "--dose", "100", "--route", "oral",
                                 "--strategy", "nls", capfd=capfd)
        assert code == 3
        status = {(f["subject"], f["model"]): f for f in doc["fits"]}
        assert status[("b", "one-comp-oral")]["status"] == "ok"
        assert status[("a", "one-comp-oral")]["status"] == "ok"
        assert status[("a", "two-comp-oral")]["status"] == "ok"
        refused = status[("b", "two-comp-oral")]
        assert refused["status"] == "failed"
        assert "3 quantified observation(s) cannot determine the 5 parameters" in refused["message"]
        assert "fewer parameters" in refused["message"]  # what to do
        comp_b = next(c for c in doc["comparison"] if c["subject"] == "b")
        assert comp_b["preferred"] == "one-comp-oral" and "two-comp-oral" in comp_b["failed"]
        # three samples for three parameters: no degrees of freedom, said in a warning
        assert any("no degrees of freedom" in w for w in status[("b", "one-comp-oral")]["warnings"])
