"""Cohort runs: fits over subjects × models, execution (serial, processes, Dask), resume,
fault isolation and time limits, the cohort report and the ``compare`` command.

Estimation checks use strategy="nls" (the likelihood stage from the template defaults)
wherever the point is execution rather than estimation, to keep the file fast.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import signal
import sys
import threading
import time
from io import StringIO

import numpy as np
import pandas as pd
import pytest
from rich.console import Console
from scipy import stats
from scipy.optimize import curve_fit

from compartments import execution
from compartments.cohort import CohortResult, run_cohort
from compartments.errors import UsageError
from compartments.execution import FitTimeout, Outcome, Task, deadline, execute, run_task, task_seed
from compartments.library import load_template
from compartments.study import read_study
from compartments.summaries import (
    covariate_correlations,
    group_tests,
    model_preference,
    parameter_summary,
    study_covariates,
    subject_comparisons,
)

MODELS = ["one-comp-oral", "two-comp-oral", "transit-oral"]


def bateman(t, dose, ka, ke, V):
    """One-compartment oral concentration (Bateman function; Gibaldi & Perrier,
    Pharmacokinetics, 2nd ed., 1982, ch. 1), F = 1, no lag."""
    return dose * ka / (V * (ka - ke)) * (np.exp(-ke * t) - np.exp(-ka * t))


def fingerprint(fit) -> bytes:
    """Every number and word of a FitResult except its timings (wall times)."""
    h = hashlib.sha256()

    def put(x):
        if isinstance(x, np.ndarray):
            h.update(str(x.dtype).encode() + str(x.shape).encode() + np.ascontiguousarray(x).tobytes())
        elif isinstance(x, dict):
            for k in sorted(x, key=str):
                put(str(k))
                put(x[k])
        elif isinstance(x, (list, tuple)):
            for v in x:
                put(v)
        elif isinstance(x, float):
            h.update(x.hex().encode() if math.isfinite(x) else repr(x).encode())
        else:
            h.update(repr(x).encode())

    for name in ("template", "subject", "status", "message", "error_model", "parameter_names", "estimates", "se",
                 "rse", "ci", "fixed", "error_parameters", "covariance", "correlation", "covariance_method",
                 "objective", "aic", "aicc", "bic", "n_obs", "n_params", "warnings", "seed", "strategy",
                 "alternatives"):
        put(getattr(fit, name))
    if fit.residuals is not None:
        r = fit.residuals
        put([r.subject, r.time, r.observable, r.observed, r.predicted, r.censored, r.raw, r.weighted])
    put({k: (d.value, d.se, d.unit) for k, d in fit.derived.items()})
    for s in fit.stages:
        put([s.name, s.phi, list(s.candidates), s.objective, s.iterations, s.status, s.message])
    return h.digest()


def same_results(a: CohortResult, b: CohortResult) -> bool:
    return [fingerprint(f) for f in a.fits] == [fingerprint(f) for f in b.fits]


# --------------------------------------------------------------------------- data


@pytest.fixture(scope="module")
def theoph(theoph_frame):
    """Theoph (Boeckmann, Sheiner & Beal 1994; R datasets): 12 subjects, oral theophylline,
    dose in mg/kg body weight (column Dose), body weight Wt a covariate."""
    return read_study(theoph_frame, dose_column="Dose", route="oral", units={"dose": "mg/kg"})


@pytest.fixture(scope="module")
def theoph_cohort(theoph):
    """Every Theoph subject × three models; a pool of two workers."""
    return run_cohort(theoph, MODELS, strategy="nls", workers=2)


def synthetic(seed: int, ke_b: float, n_per_arm: int, ke_a: float = 0.1):
    """A two-arm oral study (invented): ka 1 1/h, V 20 L, ke per arm, 20 % log-normal
    between-subject variation, 8 samples at random times in 0.25–24 h, 10 % proportional
    noise; dose 100 mg at time 0."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(2 * n_per_arm):
        arm = "A" if i < n_per_arm else "B"
        ka = 1.0 * np.exp(0.2 * rng.standard_normal())
        V = 20.0 * np.exp(0.2 * rng.standard_normal())
        ke = (ke_a if arm == "A" else ke_b) * np.exp(0.2 * rng.standard_normal())
        t = np.sort(rng.uniform(0.25, 24.0, 8))
        c = bateman(t, 100.0, ka, ke, V) * (1 + 0.1 * rng.standard_normal(t.size))
        rows += [{"id": f"s{i:02d}", "time": tt, "conc": cc, "arm": arm, "weight": 60 + i} for tt, cc in zip(t, c, strict=True)]
    return read_study(pd.DataFrame(rows), dose=100.0, route="oral")


@pytest.fixture(scope="module")
def small():
    """Four synthetic subjects for execution checks."""
    return synthetic(7, 0.2, 2)


@pytest.fixture(scope="module")
def cluster():
    """A Dask LocalCluster: two worker processes with one thread each, on loopback."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as c:
        yield c


@pytest.fixture(scope="module")
def small_serial(small):
    return run_cohort(small, ["one-comp-oral", "transit-oral"], strategy="nls", workers=1)


# --------------------------------------------------------------------------- Theoph


class TestTheoph:
    def test_every_subject_and_model_in_order(self, theoph, theoph_cohort):
        """Fits come in study order of subjects, then the order of the models given."""
        c = theoph_cohort
        assert c.subjects == theoph.ids and c.models == tuple(MODELS)
        assert [(f.subject, f.template) for f in c.fits] == [(s, m) for s in theoph.ids for m in MODELS]
        assert c.n_failed == 0 and c.complete and not c.interrupted
        assert c.settings["execution"] == "processes"

    def test_subject_one_matches_scipy_curve_fit(self, theoph, theoph_cohort):
        """Subject 1 with one-comp-oral equals an independent least-squares fit of the
        Bateman function with scipy.optimize.curve_fit (additive error = ordinary LS)."""
        s = theoph["1"]
        dose = s.doses[0].amount
        p, _ = curve_fit(lambda t, ka, ke, V: bateman(t, dose, ka, ke, V), s.times, s.values, p0=[1.5, 0.1, 0.5],
                         maxfev=20000)
        f = theoph_cohort.get("1", "one-comp-oral")
        for name, ref in zip(("ka", "ke", "V"), p, strict=True):
            assert f.estimates[name] == pytest.approx(ref, rel=1e-3)

    def test_comparison_per_subject(self, theoph_cohort):
        """Each subject's preferred model has the lowest AIC; Akaike weights sum to 1
        (Burnham & Anderson 2002, §2.9)."""
        table = subject_comparisons(theoph_cohort)
        assert list(table.index) == list(theoph_cohort.subjects)
        for sid, row in table.iterrows():
            aics = {m: theoph_cohort.get(sid, m).aic for m in MODELS}
            assert row["preferred"] == min(aics, key=aics.get)
            assert sum(row[m] for m in MODELS) == pytest.approx(1.0)
            assert theoph_cohort.comparisons[sid].preferred == row["preferred"]

    def test_cohort_model_preference(self, theoph_cohort):
        """Preferred counts add up to the subjects; summed AIC is the plain sum per model."""
        pref = model_preference(theoph_cohort)
        assert pref["preferred"].sum() == 12 and (pref["failed"] == 0).all()
        for m in MODELS:
            assert pref.loc[m, "summed"] == pytest.approx(sum(f.aic for f in theoph_cohort.for_model(m)))
        assert pref["delta_summed"].min() == 0.0

    def test_one_comp_geometric_means_match_published(self, theoph_cohort):
        """Geometric means of the individual one-compartment fits agree within 10 % with the
        published population values for Theoph: ka ≈ 1.57 1/h, ke ≈ 0.0878 1/h,
        CL/F ≈ 0.040 L/h/kg (Pinheiro & Bates, Mixed-Effects Models in S and S-PLUS, 2000,
        §6.2; from memory)."""
        s = parameter_summary(theoph_cohort, "one-comp-oral")
        assert s.loc["ka", "geo_mean"] == pytest.approx(1.57, rel=0.10)
        assert s.loc["ke", "geo_mean"] == pytest.approx(0.0878, rel=0.10)
        assert s.loc["CL", "geo_mean"] == pytest.approx(0.040, rel=0.10)
        assert s.loc["CL", "unit"] == "L/h" and s.loc["CL", "kind"] == "derived"
        assert s.loc["ka", "geo_mean"] == pytest.approx(stats.gmean([f.estimates["ka"] for f in
                                                                     theoph_cohort.for_model("one-comp-oral")]))

    def test_weight_correlation_matches_scipy(self, theoph, theoph_cohort):
        """Spearman ρ of V with body weight equals scipy.stats.spearmanr on the same numbers."""
        corr = covariate_correlations(theoph_cohort, theoph, "one-comp-oral")
        row = corr[(corr["parameter"] == "V") & (corr["covariate"] == "Wt")].iloc[0]
        v = [theoph_cohort.get(s, "one-comp-oral").estimates["V"] for s in theoph.ids]
        wt = [theoph[s].covariates["Wt"] for s in theoph.ids]
        ref = stats.spearmanr(v, wt)
        assert row["rho"] == pytest.approx(ref.statistic) and row["p_exploratory"] == pytest.approx(ref.pvalue)

    def test_cohort_panel_renders(self, theoph, theoph_cohort):
        """The cohort section names every model, the covariate and labels p-values exploratory."""
        from compartments.report.cohort import cohort_panel

        console = Console(file=StringIO(), width=140)
        console.print(cohort_panel(theoph_cohort, theoph))
        text = console.file.getvalue()
        assert "Models across subjects" in text and "Σ AIC" in text
        for m in MODELS:
            assert f"{m}: estimates across subjects" in text
        assert "Spearman" in text and "Wt" in text and "exploratory" in text
        with pytest.raises(UsageError, match="no such covariate"):
            cohort_panel(theoph_cohort, theoph, group_by="arm")

    def test_cohort_panel_on_an_80_column_terminal(self, theoph, theoph_cohort):
        """At 80 columns every number is shown whole: the summary comes in two parts, groups and
        covariates one row per level; grouping by a numeric column (11 weights among 12 subjects)
        says that such groups cannot be compared. At 200 columns the wide tables are used."""
        from compartments.report.cohort import cohort_panel

        def text(width):
            console = Console(file=StringIO(), width=width)
            console.print(cohort_panel(theoph_cohort, theoph, group_by="Wt"))
            return console.file.getvalue()

        narrow, wide = text(80), text(200)
        assert "…" not in narrow
        assert "one-comp-oral: estimates across subjects (continued)" in narrow
        assert "(continued)" not in wide
        from compartments.report.tables import fmt
        from compartments.summaries import parameter_summary

        for m in MODELS:  # each model's geometric mean of its first parameter, whole, in both layouts
            geo = fmt(parameter_summary(theoph_cohort, m)["geo_mean"].iloc[0])
            assert f" {geo} " in narrow and f" {geo} " in wide
        assert "Wt takes 11 different values among 12 subjects" in " ".join(narrow.split())
        assert "geo. mean (CV %)" in narrow

    def test_covariate_plot_data(self, theoph, theoph_cohort):
        """The scatter shows each subject's fitted V against its weight."""
        from compartments.report.cohort import covariate_figure

        fig = covariate_figure(theoph_cohort, study_covariates(theoph), "one-comp-oral", parameters=["V"])
        ax = fig.axes[0]
        pts = ax.collections[0].get_offsets()
        want = sorted((theoph[s].covariates["Wt"], theoph_cohort.get(s, "one-comp-oral").estimates["V"])
                      for s in theoph.ids)
        np.testing.assert_allclose(sorted(map(tuple, np.asarray(pts))), want, rtol=1e-12)
        assert ax.get_xlabel() == "Wt" and ax.get_ylabel() == "V (L)" and ax.get_yscale() == "log"


# --------------------------------------------------------------------------- groups


class TestGroups:
    def test_known_ke_difference_detected(self):
        """Arms with ke 0.1 and 0.3 1/h (8 subjects each): Mann–Whitney p < 0.01 for ke,
        and equal to scipy.stats.mannwhitneyu on the fitted values."""
        study = synthetic(11, 0.3, 8)
        c = run_cohort(study, ["one-comp-oral"], strategy="nls", workers=1)
        tests = group_tests(c, study, "arm", "one-comp-oral")
        assert tests.loc["ke", "test"] == "Mann–Whitney U"
        assert tests.loc["ke", "p_exploratory"] < 0.01
        a = [c.get(s.id, "one-comp-oral").estimates["ke"] for s in study if s.covariates["arm"] == "A"]
        b = [c.get(s.id, "one-comp-oral").estimates["ke"] for s in study if s.covariates["arm"] == "B"]
        assert tests.loc["ke", "p_exploratory"] == pytest.approx(stats.mannwhitneyu(a, b).pvalue)

    def test_no_difference_not_always_significant(self):
        """Same ke in both arms, three seeds: the ke p-values are not all below 0.05
        (smoke level; the benchmark checks their spread over many seeds)."""
        ps = []
        for seed in (21, 22, 23):
            study = synthetic(seed, 0.1, 6)
            c = run_cohort(study, ["one-comp-oral"], strategy="nls", workers=1)
            ps.append(group_tests(c, study, "arm", "one-comp-oral").loc["ke", "p_exploratory"])
        assert not all(p < 0.05 for p in ps), ps


# --------------------------------------------------------------------------- execution


class TestExecution:
    def test_seeds_derive_from_run_subject_and_model(self, small_serial):
        """Each fit's seed is SHA-256 of the run seed, subject and model (not Python's salted hash)."""
        for f in small_serial.fits:
            text = f"compartments-task\x00{0}\x00{f.subject}\x00{f.template}".encode()
            assert f.seed == int.from_bytes(hashlib.sha256(text).digest()[:4], "big") == task_seed(0, f.subject, f.template)
        assert len({f.seed for f in small_serial.fits}) == len(small_serial.fits)

    def test_pool_equals_serial(self, small, small_serial):
        """A pool of two worker processes gives the same numbers, bit for bit."""
        before = {k: os.environ.get(k) for k in execution.THREAD_VARIABLES}
        pool = run_cohort(small, ["one-comp-oral", "transit-oral"], strategy="nls", workers=2)
        assert pool.settings["execution"] == "processes"
        assert same_results(pool, small_serial)
        assert {k: os.environ.get(k) for k in execution.THREAD_VARIABLES} == before  # set for workers only

    def test_dask_equals_serial(self, small, small_serial, cluster):
        """A Dask LocalCluster (two worker processes on loopback) gives the same numbers."""
        dask = run_cohort(small, ["one-comp-oral", "transit-oral"], strategy="nls", scheduler=cluster.scheduler_address)
        assert dask.settings["execution"] == "dask"
        assert same_results(dask, small_serial)

    def test_dask_fit_timeout(self, small, cluster):
        """On Dask (fits run in worker threads) a fit past its limit is stopped too."""
        c = run_cohort(small, ["one-comp-oral"], strategy="multistart", subjects=["s00"], fit_timeout=0.3,
                       fit_options={"n_starts": 2048}, scheduler=cluster)
        assert c.fits[0].message.startswith("timed out after 0.3 s")

    def test_hybrid_pool_equals_serial(self, small):
        """With the network stage, a pool still matches the serial run."""
        pytest.importorskip("compartments.estimate.pinn")
        # The network stage has a wall-clock safety net (max_time, default 120 s), which
        # makes its result depend on machine load; a generous budget keeps this a test of
        # execution only.
        kw = dict(subjects=["s00", "s03"], strategy="hybrid", fit_options={"network": {"max_time": 600.0}})
        a = run_cohort(small, ["one-comp-oral"], workers=1, **kw)
        b = run_cohort(small, ["one-comp-oral"], workers=2, **kw)
        assert all(f.ok for f in a.fits) and same_results(a, b)

    def test_unreachable_scheduler_is_a_clear_error(self, small, monkeypatch):
        """A scheduler address nobody answers at is one line with the remedy."""
        pytest.importorskip("distributed")
        monkeypatch.setattr(execution, "CONNECT_TIMEOUT", "1s")
        with pytest.raises(UsageError, match="cannot reach the Dask scheduler at tcp://127.0.0.1:9.*dask scheduler"):
            run_cohort(small, ["one-comp-oral"], strategy="nls", subjects=["s00"], scheduler="tcp://127.0.0.1:9")

    def test_missing_distributed_is_a_clear_error(self, small, monkeypatch):
        """Without the distributed package a scheduler address is refused with the remedy."""
        monkeypatch.setitem(sys.modules, "distributed", None)
        task = Task.from_subjects([small["s00"]], load_template("one-comp-oral"), {"strategy": "nls", "seed": 1})
        with pytest.raises(UsageError, match=r"compartments\[cluster\]"):
            execute([task], lambda o: None, scheduler="tcp://127.0.0.1:8786")


class TestResume:
    def test_resume_after_partial_run(self, small, small_serial, tmp_path):
        """A run killed after some subjects, resumed, ends equal to an uninterrupted run,
        and the finished fits are read back rather than refitted."""
        run = tmp_path / "run"
        first = run_cohort(small, ["one-comp-oral", "transit-oral"], strategy="nls", workers=1,
                           subjects=["s00", "s01"], run_dir=run)
        assert len(first.fits) == 4 and len(list((run / "fits").glob("*.pickle"))) == 4
        done = run_cohort(small, ["one-comp-oral", "transit-oral"], strategy="nls", workers=2, run_dir=run,
                          resume=True)
        assert done.settings["resumed"] == 4 and done.complete
        assert same_results(done, small_serial)

    @pytest.mark.parametrize("workers", [1, 2])
    def test_interrupt_from_progress_then_resume(self, small, small_serial, tmp_path, workers):
        """Ctrl-C (a KeyboardInterrupt from the progress callback) keeps every finished fit;
        resuming completes the run with the same results."""
        run = tmp_path / "run"
        calls = []

        def progress(done, total, failed):
            calls.append((done, total, failed))
            if done >= 3:
                raise KeyboardInterrupt

        cut = run_cohort(small, ["one-comp-oral", "transit-oral"], strategy="nls", workers=workers, run_dir=run,
                         progress=progress)
        assert cut.interrupted and not cut.complete and len(cut.fits) == 3
        assert calls[0] == (0, 8, 0) and calls[-1][0] == 3
        assert len(list((run / "fits").glob("*.json"))) == 3
        assert f"--resume {run}" in cut.resume_hint()
        done = run_cohort(small, ["one-comp-oral", "transit-oral"], strategy="nls", workers=1, run_dir=run,
                          resume=True)
        assert done.settings["resumed"] == 3 and done.complete and same_results(done, small_serial)

    def test_resume_with_other_settings_refused(self, small, tmp_path):
        """Resuming with another error model is one clear error naming the setting."""
        run = tmp_path / "run"
        run_cohort(small, ["one-comp-oral"], strategy="nls", workers=1, subjects=["s00"], run_dir=run)
        with pytest.raises(UsageError, match="error='additive' there, 'proportional' now"):
            run_cohort(small, ["one-comp-oral"], strategy="nls", error="proportional", workers=1, run_dir=run,
                       resume=True)
        with pytest.raises(UsageError, match="already holds a run"):
            run_cohort(small, ["one-comp-oral"], strategy="nls", workers=1, run_dir=run)
        other = tmp_path / "other"
        other.mkdir()
        (other / "notes.txt").write_text("mine")
        with pytest.raises(UsageError, match="no run to resume"):
            run_cohort(small, ["one-comp-oral"], strategy="nls", workers=1, run_dir=other, resume=True)
        with pytest.raises(UsageError, match="not empty"):
            run_cohort(small, ["one-comp-oral"], strategy="nls", workers=1, run_dir=other)

    def test_resume_with_changed_data_refused(self, small, tmp_path):
        """A saved fit made from other data is not silently reused."""
        run = tmp_path / "run"
        run_cohort(small, ["one-comp-oral"], strategy="nls", workers=1, subjects=["s00"], run_dir=run)
        changed = [s.with_(values=s.values * 1.01) if s.id == "s00" else s for s in small]
        with pytest.raises(UsageError, match="subject s00 with one-comp-oral was made from other data"):
            run_cohort(changed, ["one-comp-oral"], strategy="nls", workers=1, run_dir=run, resume=True)


# --------------------------------------------------------------------------- faults


def _stubborn(task: Task) -> Outcome:
    """A task that ignores the in-worker stop (SIGALRM blocked) and sleeps: only the
    parent's watchdog can end it."""
    if task.subject == "s01":
        signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGALRM})
        time.sleep(60)
    return run_task(task)


class TestFaults:
    def test_too_few_observations_fails_alone(self, small):
        """A subject with two observations cannot determine three parameters: that fit fails
        with the reason; the others are fitted."""
        s = small["s01"]
        short = s.with_(times=s.times[:2], values=s.values[:2], observables=s.observables[:2],
                        censored=s.censored[:2], lloq=s.lloq[:2], rows=s.rows[:2])
        subjects = [short if x.id == "s01" else x for x in small]
        c = run_cohort(subjects, ["one-comp-oral", "transit-oral"], strategy="nls", workers=1)
        bad = [f for f in c.fits if not f.ok]
        assert c.n_failed == 2 and {f.subject for f in bad} == {"s01"}
        assert all("2 quantified observation(s) cannot determine the 3 parameters" in f.message for f in bad)
        assert all(f.ok for f in c.fits if f.subject != "s01")
        assert c.comparisons["s01"].preferred is None and set(c.comparisons["s01"].failed) == set(c.models)

    def test_unexpected_exception_is_one_line(self, small):
        """Any other exception in a fit becomes a failed result naming its type."""
        t = Task.from_subjects([small["s00"]], load_template("one-comp-oral"), {"strategy": "nls", "seed": 1})
        bad = Task(t.subject, t.model, t.template, (("object", object()),), t.options)
        out = run_task(bad)
        assert out.result.status == "failed" and not out.final
        assert out.result.message.startswith("unexpected error AttributeError:") and "\n" not in out.result.message

    @pytest.mark.parametrize("workers", [1, 2])
    def test_fit_timeout(self, small, workers):
        """A fit running past fit_timeout is recorded as timed out, serially and in a pool."""
        t0 = time.monotonic()
        c = run_cohort(small, ["one-comp-oral"], strategy="multistart", subjects=["s00", "s01"], workers=workers,
                       fit_timeout=0.2, fit_options={"n_starts": 2048})
        assert time.monotonic() - t0 < 20
        assert c.n_failed == 2
        assert all(f.message.startswith("timed out after 0.2 s") for f in c.fits)

    def test_stuck_worker_is_stopped(self, small, monkeypatch):
        """A worker that ignores the stop is ended by the parent; the other fits still run."""
        monkeypatch.setattr(execution, "HARD_GRACE", 0.5)
        template = load_template("one-comp-oral")
        tasks = [Task.from_subjects([small[s]], template, {"strategy": "nls", "seed": 1},
                                    timeout=0.3 if s == "s01" else None) for s in ("s00", "s01", "s02")]
        got = []
        t0 = time.monotonic()
        execute(tasks, got.append, workers=2, fn=_stubborn)
        assert time.monotonic() - t0 < 15
        by = {o.subject: o for o in got}
        assert sorted(by) == ["s00", "s01", "s02"]
        assert by["s01"].result.message.startswith("timed out after 0.3 s") and "stopped" in by["s01"].result.message
        assert by["s00"].result.ok and by["s02"].result.ok

    def test_deadline_in_a_thread(self):
        """Away from the main thread the stop is raised into the running thread."""
        seen = []

        def work():
            try:
                with deadline(0.1):
                    while True:
                        sum(range(1000))
            except FitTimeout:
                seen.append("stopped")

        th = threading.Thread(target=work)
        th.start()
        th.join(5)
        assert seen == ["stopped"]


class TestOptions:
    def test_invalid_options(self, small):
        """Bad options are refused before any fit, with one line saying what to do."""
        cases = [
            (dict(workers=0), "workers=0"),
            (dict(seed=-1), "seed=-1"),
            (dict(fit_timeout=-1), "fit_timeout=-1"),
            (dict(subjects=["nope"]), "no subject 'nope'"),
            (dict(fixed={"kx": 1.0}), "'kx' is in none of the templates"),
            (dict(strategy="guess"), "strategy='guess'"),
            (dict(resume=True), "resume needs the run directory"),
        ]
        for kw, msg in cases:
            kw = {"strategy": "nls", **kw}
            with pytest.raises(UsageError, match=msg):
                run_cohort(small, ["one-comp-oral"], **kw)
        with pytest.raises(UsageError, match="share the name"):
            run_cohort(small, ["one-comp-oral", load_template("one-comp-oral")], strategy="nls")

    def test_fixed_goes_to_templates_that_have_it(self, small):
        """ktr exists only in transit-oral: it is held there and one-comp-oral is fitted as usual."""
        c = run_cohort(small, ["one-comp-oral", "transit-oral"], strategy="nls", workers=1, subjects=["s00"],
                       fixed={"ktr": 2.0})
        transit, one = c.get("s00", "transit-oral"), c.get("s00", "one-comp-oral")
        assert transit.ok and transit.fixed["ktr"] == 2.0 and "ktr" not in transit.estimates
        assert one.ok and set(one.estimates) == {"ka", "ke", "V"}

    def test_pooled(self, small):
        """A pooled run has one fit per model, labelled 'pooled'."""
        c = run_cohort(small, ["one-comp-oral"], strategy="nls", workers=2, pooled=True)
        assert c.subjects == ("pooled",) and [f.subject for f in c.fits] == ["pooled"] and c.fits[0].ok
        assert c.fits[0].n_obs == sum(s.n_obs for s in small)


# --------------------------------------------------------------------------- compare command


class TestCompareCommand:
    @pytest.fixture(scope="class")
    @classmethod
    def documents(cls, theoph, theoph_cohort, tmp_path_factory):
        """Two run documents (odd and even Theoph subjects) written by the fit command's exporter."""
        from compartments.report.export import run_document, write_json

        folder = tmp_path_factory.mktemp("runs")
        paths = []
        for name, keep in (("odd", {"1", "3", "5", "7", "9", "11"}), ("even", {"2", "4", "6", "8", "10", "12"})):
            fits = tuple(f for f in theoph_cohort.fits if f.subject in keep)
            part = CohortResult(fits=fits, subjects=tuple(s for s in theoph_cohort.subjects if s in keep),
                                models=theoph_cohort.models,
                                comparisons={k: v for k, v in theoph_cohort.comparisons.items() if k in keep},
                                settings=dict(theoph_cohort.settings))
            paths.append(write_json(run_document(part, theoph, part.settings), folder / f"{name}.json"))
        return paths

    def test_compare_two_runs(self, documents, theoph_cohort, capsys, tmp_path):
        """Runs side by side: the per-run geometric means and the Mann–Whitney p-value equal
        the summaries computed on the fits directly."""
        from compartments.cli import main

        main(["compare", str(documents[0]), str(documents[1]), "--model", "one-comp-oral",
              "--out", str(tmp_path / "tables")])  # returns normally on success
        text = capsys.readouterr().out
        assert "one-comp-oral: by run" in text and "M–W U" in text and "exploratory" in text
        table = pd.read_csv(tmp_path / "tables" / "parameters_by_run.csv")
        odd = [f.estimates["ke"] for f in theoph_cohort.for_model("one-comp-oral") if int(f.subject) % 2]
        even = [f.estimates["ke"] for f in theoph_cohort.for_model("one-comp-oral") if not int(f.subject) % 2]
        got = table[(table["parameter"] == "ke")].set_index("run")["geo_mean"]
        assert got["odd"] == pytest.approx(stats.gmean(odd)) and got["even"] == pytest.approx(stats.gmean(even))
        tests = pd.read_csv(tmp_path / "tables" / "tests_between_runs.csv").set_index("parameter")
        assert tests.loc["ke", "p_exploratory"] == pytest.approx(stats.mannwhitneyu(odd, even).pvalue)

    def test_bad_file_is_one_line(self, documents, capsys, tmp_path):
        """A file that is not a run document: exit code 2 and one line naming it."""
        from compartments.cli import main

        bad = tmp_path / "bad.json"
        bad.write_text(json.dumps({"schema": "something/1"}))
        for path, msg in ((bad, "not a run document"), (tmp_path / "none.json", "no such file")):
            with pytest.raises(SystemExit) as exit_info:
                main(["compare", str(documents[0]), str(path)])
            assert exit_info.value.code == 2
            err = capsys.readouterr().err.strip()
            assert msg in err and len(err.splitlines()) == 1 and str(path) in err


def test_no_threads_left_behind():
    """Deadlines leave no watcher threads running."""
    time.sleep(0.2)
    assert not [t for t in threading.enumerate() if t.name == "compartments-fit-deadline"]

