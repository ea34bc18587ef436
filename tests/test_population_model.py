"""Population estimation: derivatives, evaluator, covariates, result record, bad input, determinism.

Derivatives are checked against central finite differences (common practice); the batched
evaluator against :func:`compartments.simulate.simulate` (itself checked against
``scipy.integrate.solve_ivp`` in test_simulate.py); the censored likelihood against
``scipy.stats.norm``.
"""

from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from compartments import (
    Dose,
    PopulationResult,
    UsageError,
    fit_population,
    load_template,
    read_study,
)
from compartments.estimate.problem import make_problem
from compartments.model import compiled
from compartments.population.design import build_design
from compartments.population.evaluate import LinearEvaluator, SimulateEvaluator
from compartments.population.fit import prepare
from compartments.population.foce import foce_objective
from compartments.population.residual import ResidualModel, Rows, terms


def bateman(t, dose, ka, ke, V):
    return dose * ka / (V * (ka - ke)) * (np.exp(-ke * t) - np.exp(-ka * t))


def sparse_oral(seed: int = 0, n: int = 60, weight: bool = True, lloq: float | None = None) -> pd.DataFrame:
    """n subjects, 100 mg oral, 3 samples at 0.5–24 h; CL = 2 L/h·(WT/70)^0.75 and
    V = 30 L·(WT/70) (allometric, common practice); ka 1.2 1/h; 30 %, 20 % and 25 %
    log-normal variability on ka, CL, V; 10 % proportional error."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        wt = float(np.clip(70 * np.exp(0.2 * rng.standard_normal()), 40, 120))
        ka = 1.2 * np.exp(0.3 * rng.standard_normal())
        V = 30 * (wt / 70) * np.exp(0.25 * rng.standard_normal())
        cl = 2.0 * (wt / 70) ** 0.75 * np.exp(0.2 * rng.standard_normal())
        for t in np.sort(rng.uniform(0.5, 24, 3)):
            c = bateman(t, 100, ka, cl / V, V) * (1 + 0.1 * rng.standard_normal())
            row = {"id": f"p{i:03d}", "time": t, "conc": c, "weight": round(wt, 1), "sex": "F" if i % 2 else "M"}
            if lloq is not None:
                row["conc"] = f"<{lloq}" if c < lloq else c
            rows.append(row)
    return pd.DataFrame(rows)


# --------------------------------------------------------------------------- derivatives


class TestResidualTerms:
    @pytest.mark.parametrize("kind", ["additive", "proportional", "combined", "lognormal"])
    def test_derivatives_match_finite_differences(self, kind):
        """t_f, t_ff, t_s, t_fs, w_f and w_s equal central differences, quantified and censored rows."""
        r = ResidualModel(kind, ("c",))
        y = np.array([[1.3, 0.8, 0.5, 2.0]])
        cens = np.array([[False, False, True, False]])
        rows = Rows.build(r, y, cens, np.zeros((1, 4), np.int64), np.ones((1, 4), bool))
        f = np.array([[1.1, 0.9, 0.7, 1.6]])
        s = np.log([0.2, 0.15][: r.n_params])
        T = terms(r, rows, f, s, order=2)
        h = 1e-6
        up, dn = terms(r, rows, f + h, s, order=2), terms(r, rows, f - h, s, order=2)
        np.testing.assert_allclose(T.t_f, (up.t - dn.t) / (2 * h), rtol=1e-6, atol=1e-7)
        np.testing.assert_allclose(T.t_ff, (up.t_f - dn.t_f) / (2 * h), rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(T.w_f, (up.w - dn.w) / (2 * h), rtol=1e-5, atol=1e-6)
        for e in range(r.n_params):
            d = np.zeros_like(s)
            d[e] = h
            up, dn = terms(r, rows, f, s + d, order=2), terms(r, rows, f, s - d, order=2)
            np.testing.assert_allclose(T.t_s[..., e], (up.t - dn.t) / (2 * h), rtol=1e-6, atol=1e-7)
            np.testing.assert_allclose(T.t_fs[..., e], (up.t_f - dn.t_f) / (2 * h), rtol=1e-5, atol=1e-6)
            np.testing.assert_allclose(T.w_s[..., e], (up.w - dn.w) / (2 * h), rtol=1e-5, atol=1e-6)

    def test_censored_row_is_the_normal_cdf(self):
        """A censored row contributes −2 log Φ((LLOQ − f)/σ) (Beal 2001, M3; scipy.stats.norm)."""
        r = ResidualModel("additive", ("c",))
        rows = Rows.build(r, np.array([[0.5]]), np.array([[True]]), np.zeros((1, 1), np.int64), np.ones((1, 1), bool))
        T = terms(r, rows, np.array([[0.7]]), np.log([0.2]))
        assert T.t[0, 0] == pytest.approx(-2 * stats.norm.logcdf((0.5 - 0.7) / 0.2), rel=1e-12)

    def test_quantified_row_is_the_normal_density(self):
        """A quantified row contributes −2 log φ (scipy.stats.norm.logpdf), log-normal on the y scale."""
        for kind, sd, dens in (("additive", 0.2, stats.norm(0.7, 0.2).logpdf(0.5)),
                               ("lognormal", 0.2, stats.lognorm(0.2, scale=0.7).logpdf(0.5))):
            r = ResidualModel(kind, ("c",))
            rows = Rows.build(r, np.array([[0.5]]), np.array([[False]]), np.zeros((1, 1), np.int64),
                              np.ones((1, 1), bool))
            T = terms(r, rows, np.array([[0.7]]), np.log([sd]))
            assert T.t[0, 0] == pytest.approx(-2 * dens, rel=1e-12)


class TestFoceGradient:
    @pytest.mark.parametrize("error,variability", [("proportional", "diagonal"), ("combined", "full"),
                                                   ("additive", "diagonal")])
    def test_gradient_matches_finite_differences(self, error, variability):
        """The implicit-differentiation gradient equals central differences of the objective
        (inner problems solved tightly) to 1e-4 relative, with covariates and censored rows."""
        study = read_study(sparse_oral(1, n=12, lloq=0.5), dose=100.0, route="oral")
        s = prepare(study, "one-comp-oral", ["ka", "ke", "V"], error=error, variability=variability,
                    covariates=[("V", "weight", "power"), ("ke", "sex", "categorical")])
        assert s.design.censored.any()
        err = {"sd_concentration": 0.1, "cv_concentration": 0.12}
        om = np.diag([0.1, 0.05, 0.07])
        if variability == "full":
            om[0, 2] = om[2, 0] = 0.02
        x = s.pm.pack({"ka": 1.0, "ke": 0.07, "V": 28.0}, om, err, {"V:weight": 0.8, "ke:sex=M": 1.1})
        eta0 = np.zeros((s.design.n_subjects, 3))
        o = foce_objective(s.pm, s.design, s.ev, x, eta0, tol=1e-12)
        fd = np.zeros_like(x)
        for j in range(x.size):
            h = 1e-5
            xp, xm = x.copy(), x.copy()
            xp[j] += h
            xm[j] -= h
            fd[j] = (foce_objective(s.pm, s.design, s.ev, xp, o.modes.point.eta, gradient=False, tol=1e-12).value
                     - foce_objective(s.pm, s.design, s.ev, xm, o.modes.point.eta, gradient=False, tol=1e-12).value) / (2 * h)
        np.testing.assert_allclose(o.gradient, fd, rtol=1e-4, atol=1e-4 * np.max(np.abs(fd)))


class TestEvaluator:
    @pytest.mark.parametrize("name,doses", [
        ("one-comp-oral", (Dose(0, 100, "oral"), Dose(12, 50, "oral"))),
        ("one-comp-iv", (Dose(0, 100, "iv"), Dose(3, 80, "infusion", duration=2.0))),
        ("two-comp-oral", (Dose(0, 100, "oral"),)),
        ("transit-oral", (Dose(1, 100, "oral"),)),
    ])
    def test_batched_equals_simulate(self, name, doses):
        """Predictions and Jacobians of the batched exact evaluator equal simulate() to 1e-10,
        with a lag time, repeated doses, an infusion and samples at dose times."""
        rng = np.random.default_rng(0)
        tpl = load_template(name)
        m = compiled(tpl)
        subs = [SimpleNamespace(id=str(i), times=np.sort(rng.uniform(0, 24, 5)), values=np.ones(5),
                                observables=(None,) * 5, censored=np.zeros(5, bool), doses=doses) for i in range(3)]
        subs[0].times[0] = 0.0
        subs[1].times[1] = 3.0
        prob = make_problem(m, subs, estimate=[p.name for p in tpl.parameters if p.fixed])
        des = build_design(prob.data, ResidualModel("additive", m.observable_names))
        th = np.array([m.defaults * np.exp(0.2 * rng.standard_normal(m.n_params)) for _ in range(3)])
        if "tlag" in m.parameter_names:
            th[:, m.parameter_names.index("tlag")] = [0.3, 0.0, 1.1]
        idx = np.array([0, 1, 2])
        F1, J1 = SimulateEvaluator(m, des)(th, idx, True)
        F2, J2 = LinearEvaluator(m, des)(th, idx, True)
        np.testing.assert_allclose(F2, F1, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(J2, J1, rtol=1e-10, atol=1e-10 * np.max(np.abs(J1)))


# --------------------------------------------------------------------------- fits


@pytest.fixture(scope="module")
def sparse_study():
    return read_study(sparse_oral(0), dose=100.0, route="oral")


@pytest.fixture(scope="module")
def sparse_fit(sparse_study):
    return fit_population(sparse_study, "one-comp-oral", random=["ka", "ke", "V"],
                          covariates=[("V", "weight", "power")], error="proportional", method="foce", seed=0,
                          npde_draws=200, starts="defaults")


class TestRecovery:
    def test_sparse_design_recovers_parameters(self, sparse_fit):
        """Smoke test: 60 subjects with 3 samples each; typical values within 3 SE of the
        simulated ones (ka 1.2, ke 2/30, V 30; the weight exponent on V 1.0), error CV near 10 %."""
        p = sparse_fit
        assert p.converged
        for n, true in (("ka", 1.2), ("ke", 2 / 30), ("V", 30.0), ("V:weight", 1.0)):
            est = p.effects[n] if ":" in n else p.typical[n]
            assert abs(est - true) < 3 * p.se[n], (n, est, true, p.se[n])
            lo, hi = p.ci[n]
            assert lo < est < hi
        assert p.error_parameters["cv_concentration"] == pytest.approx(0.1, rel=0.3)

    def test_record_is_complete(self, sparse_fit, sparse_study):
        """Individual rows per subject, predictions per observation, shrinkage per effect,
        AIC/BIC from the objective (Akaike 1974; Schwarz 1978)."""
        p = sparse_fit
        assert list(p.individual.index) == list(sparse_study.ids)
        assert {"ka", "ke", "V", "sd_ka", "random_effect_V"} <= set(p.individual.columns)
        assert len(p.predictions) == sum(s.n_obs for s in sparse_study)
        assert {"population_prediction", "individual_prediction", "cwres", "npde", "iwres"} <= set(p.predictions)
        assert set(p.shrinkage) == {"ka", "ke", "V", "residual"}
        assert p.aic == pytest.approx(p.objective + 2 * p.n_parameters)
        assert p.bic == pytest.approx(p.objective + p.n_parameters * np.log(p.n_obs))
        assert list(p.variability.index) == ["ka", "ke", "V"]
        assert p.rse["V"] == pytest.approx(100 * p.se["V"] / p.typical["V"])

    def test_npde_and_cwres_are_standard_normal(self, sparse_fit):
        """On data simulated from the model, NPDE and CWRES have mean ≈ 0 and SD ≈ 1
        (Brendel et al. 2006; Hooker et al. 2007): |mean| < 0.25, SD within 0.75–1.3."""
        for col in ("npde", "cwres"):
            v = sparse_fit.predictions[col].dropna().to_numpy()
            assert abs(v.mean()) < 0.25 and 0.75 < v.std() < 1.3, col

    def test_round_trip_through_json(self, sparse_fit):
        """to_dict() is plain JSON and from_dict() gives back the same numbers."""
        d = json.loads(json.dumps(sparse_fit.to_dict()))
        back = PopulationResult.from_dict(d)
        assert back.typical == sparse_fit.typical and back.effects == sparse_fit.effects
        np.testing.assert_array_equal(back.variability_matrix, sparse_fit.variability_matrix)
        pd.testing.assert_frame_equal(back.individual, sparse_fit.individual, check_dtype=False)
        pd.testing.assert_frame_equal(back.predictions, sparse_fit.predictions, check_dtype=False)
        assert back.ci == sparse_fit.ci and back.warnings == sparse_fit.warnings
        assert "Research use only" in back.summary()


class TestCensoredAndShrinkage:
    def test_m3_fit_and_warnings(self):
        """With values below an LLOQ of 0.8 mg/L kept as censored, the fit converges, the
        rows have no residuals, and a subject with nothing quantified is named in a warning."""
        frame = sparse_oral(2, n=40, lloq=0.8)
        frame.loc[frame["id"] == "p000", "conc"] = "<0.8"
        study = read_study(frame, dose=100.0, route="oral")
        p = fit_population(study, "one-comp-oral", random=["ka", "V"], error="proportional", method="foce",
                           starts="defaults", npde_draws=50)
        assert p.converged
        cens = p.predictions["censored"].to_numpy()
        assert cens.any() and np.all(np.isnan(p.predictions.loc[cens, "cwres"]))
        assert any("no quantified observation (p000)" in w for w in p.warnings)


class TestDeterminism:
    def test_same_seed_same_numbers_serial_and_pool(self):
        """SAEM with the same seed gives identical numbers whether the start fits run serially
        or in a pool of two processes."""
        study = read_study(sparse_oral(4, n=8), dose=100.0, route="oral")
        from compartments.population import SaemSettings

        kw = dict(random=["ka", "V"], error="proportional", method="saem", seed=3, npde_draws=20,
                  importance_draws=100, saem=SaemSettings(min_explore=20, max_explore=25, smoothing=10))
        a = fit_population(study, "one-comp-oral", workers=1, **kw)
        b = fit_population(study, "one-comp-oral", workers=2, **kw)
        np.testing.assert_array_equal(a.estimate_vector, b.estimate_vector)
        assert a.objective == b.objective
        pd.testing.assert_frame_equal(a.predictions, b.predictions)


@pytest.fixture(scope="module")
def small_study():
    return read_study(sparse_oral(5, n=6), dose=100.0, route="oral")


class TestBadInput:

    @pytest.mark.parametrize("kwargs,words", [
        ({"random": ["CL"]}, "'CL' is not an estimated parameter"),
        ({"random": "V"}, "takes a list"),
        ({"random": {"V": "uniform"}}, "'lognormal'"),
        ({"random": ["V"], "covariates": [("V", "height", "power")]}, "no covariate column 'height'"),
        ({"random": ["V"], "covariates": [("V", "weight", "cubic")]}, "not one of power"),
        ({"random": ["V"], "covariates": [("V", "sex", "power")]}, "non-numeric"),
        ({"random": ["V"], "method": "laplace"}, "method must be one of"),
        ({"random": ["V"], "variability": [["ka", "V"]]}, "'ka' has no random effect"),
    ])
    def test_one_clear_message(self, small_study, kwargs, words):
        """Each mistake is refused with a message that names it."""
        with pytest.raises(UsageError, match=words):
            fit_population(small_study, "one-comp-oral", **kwargs)

    def test_missing_covariate_names_subjects(self):
        """A covariate missing for a subject is an error naming that subject."""
        frame = sparse_oral(6, n=5)
        frame.loc[frame["id"] == "p002", "weight"] = np.nan
        study = read_study(frame, dose=100.0, route="oral")
        with pytest.raises(UsageError, match="missing for 1 subject.*p002"):
            fit_population(study, "one-comp-oral", random=["V"], covariates=[("V", "weight", "power")])

    def test_time_varying_covariate_is_refused(self):
        """A covariate that changes within a subject is refused with what to do instead."""
        frame = sparse_oral(7, n=5)
        frame.loc[frame.index[1], "weight"] = 99.0
        study = read_study(frame, dose=100.0, route="oral")
        with pytest.raises(UsageError, match="changes within a subject"):
            fit_population(study, "one-comp-oral", random=["V"], covariates=[("V", "weight", "power")])


@pytest.fixture(scope="module")
def iv_study():
    """15 subjects, 100 mg IV bolus, samples at 1, 4, 8 h; V 20 L (SD 0.3), ke 0.2 1/h, 10 % log-normal error."""
    rng = np.random.default_rng(11)
    rows = [{"id": i, "time": t, "conc": 100 / (20 * np.exp(0.3 * e)) * np.exp(-0.2 * t) * np.exp(0.1 * rng.standard_normal())}
            for i, e in enumerate(rng.standard_normal(15)) for t in (1.0, 4.0, 8.0)]
    return read_study(pd.DataFrame(rows), dose=100, route="iv")


class TestOptions:

    def test_fixed_parameter_is_held(self, iv_study):
        """fixed={"ke": 0.2} holds ke; only V and its variability are estimated."""
        p = fit_population(iv_study, "one-comp-iv", random=["V"], error="lognormal", method="foce",
                           starts="defaults", fixed={"ke": 0.2}, npde_draws=20)
        assert list(p.typical) == ["V"] and p.model["fixed"] == {"ke": 0.2}
        assert p.typical["V"] == pytest.approx(20, rel=0.15)

    def test_sandwich_is_near_the_hessian_covariance(self, iv_study):
        """For a correctly specified model the sandwich and the inverse-Hessian SEs agree within
        a factor of 2 (White 1982: both estimate the same covariance)."""
        kw = dict(random=["V"], error="lognormal", method="foce", starts="defaults", npde_draws=20)
        a = fit_population(iv_study, "one-comp-iv", **kw)
        b = fit_population(iv_study, "one-comp-iv", covariance="sandwich", **kw)
        assert b.covariance_method.startswith("sandwich")
        for k in ("V", "ke", "var(V)"):
            assert 0.5 < b.se[k] / a.se[k] < 2.0
