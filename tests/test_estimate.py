"""The estimator against outside references: scipy's curve_fit on closed forms, published
population values, synthetic recovery, and the likelihood's own calculus."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from scipy.optimize import check_grad, curve_fit
from scipy.stats import gmean

from compartments import Dose, FitError, fit, load_template, read_study
from compartments.estimate.likelihood import neg2ll
from compartments.model import compiled
from compartments.simulate import simulate
from compartments.study import Subject

STRATEGY = "hybrid"  # the default, as a user would run it


def bateman(dose):
    """Bateman function (Bateman 1910; Gibaldi & Perrier, Pharmacokinetics, 2nd ed., 1982)."""
    return lambda t, ka, ke, V: dose * ka / (V * (ka - ke)) * (np.exp(-ke * t) - np.exp(-ka * t))


def synthetic(template, truth, doses, times, *, observable=None, noise=0.0, seed=0, kind="proportional",
              lloq=None):
    m = compiled(load_template(template))
    r = simulate(m, truth, doses, times)
    names = m.observable_names
    obs = list(names) if observable is None else [observable]
    t_all, y_all, o_all = [], [], []
    rng = np.random.default_rng(seed)
    for o in obs:
        y = r.observable(o)
        if noise:
            y = y * (1 + noise * rng.standard_normal(y.size)) if kind == "proportional" else y + noise * rng.standard_normal(y.size)
        t_all.append(times)
        y_all.append(y)
        o_all += [o if len(names) > 1 else None] * len(times)
    t = np.concatenate(t_all)
    y = np.concatenate(y_all)
    cens = np.zeros(t.size, bool)
    lq = np.full(t.size, np.nan)
    if lloq is not None:
        cens = y < lloq
        y = np.where(cens, lloq, y)
        lq[:] = lloq
    return Subject(id="s", times=t, values=y, observables=tuple(o_all), censored=cens, lloq=lq,
                   rows=np.arange(2, t.size + 2), doses=tuple(doses), covariates={}, flags=())


@pytest.fixture(scope="module")
def theoph(theoph_csv):
    # The call exactly as in the documented API.
    return read_study(theoph_csv, columns={"subject": "Subject", "time": "Time", "value": "conc"},
                      dose_column="Dose")


@pytest.fixture(scope="module")
def theoph_fits(theoph):
    return {sid: fit(theoph[sid], load_template("one-comp-oral"), error="additive", seed=0, strategy=STRATEGY)
            for sid in theoph.ids}


class TestTheoph:
    def test_every_subject_equals_curve_fit(self, theoph, theoph_fits):
        """Estimates equal scipy.optimize.curve_fit on the Bateman function to 1e-4 and the SE
        (s² = SSR/(n−p), standard nonlinear regression) to 1e-2 (scipy as reference)."""
        for sid, r in theoph_fits.items():
            s = theoph[sid]
            est = np.array([r.estimates[k] for k in ("ka", "ke", "V")])
            p, cov = curve_fit(bateman(s.doses[0].amount), s.times, s.values, p0=est * [1.2, 0.8, 1.1],
                               xtol=1e-14, ftol=1e-14, maxfev=20000)
            np.testing.assert_allclose(est, p, rtol=1e-4, err_msg=f"subject {sid}")
            se = np.array([r.se[k] for k in ("ka", "ke", "V")])
            np.testing.assert_allclose(se, np.sqrt(np.diag(cov)), rtol=1e-2, err_msg=f"subject {sid}")

    def test_subject_1_values(self, theoph_fits):
        """Subject 1: ka 1.777 1/h, ke 0.0540 1/h, V 0.369 L/kg (curve_fit on the Bateman
        function, computed once with scipy and quoted in the issue)."""
        r = theoph_fits["1"]
        assert r.estimates["ka"] == pytest.approx(1.777, rel=1e-3)
        assert r.estimates["ke"] == pytest.approx(0.0540, rel=1e-3)
        assert r.estimates["V"] == pytest.approx(0.369, rel=2e-3)

    def test_geometric_means_match_population_values(self, theoph_fits):
        """Geometric means within 10 % of ka ≈ 1.57 1/h, ke ≈ 0.0878 1/h, CL/F ≈ 0.040 L/h/kg
        (Pinheiro & Bates, Mixed-Effects Models in S and S-PLUS, 2000 — from memory)."""
        fits = list(theoph_fits.values())
        assert gmean([f.estimates["ka"] for f in fits]) == pytest.approx(1.57, rel=0.10)
        assert gmean([f.estimates["ke"] for f in fits]) == pytest.approx(0.0878, rel=0.10)
        assert gmean([f.derived["CL"].value for f in fits]) == pytest.approx(0.040, rel=0.10)

    def test_result_object(self, theoph_fits):
        """The FitResult carries what reports need, consistently."""
        r = theoph_fits["1"]
        assert r.ok and r.n_obs == 11 and r.n_params == 4
        lo, hi = r.ci["ka"]
        assert lo < r.estimates["ka"] < hi
        assert r.rse["ke"] == pytest.approx(100 * r.se["ke"] / r.estimates["ke"])
        # AIC = −2LL + 2k; BIC = −2LL + k·ln n (Akaike 1974; Schwarz 1978)
        assert r.aic == pytest.approx(r.objective + 2 * 4)
        assert r.bic == pytest.approx(r.objective + 4 * np.log(11))
        # −2LL with the ML variance SSR/n: n·ln(2π·SSR/n) + n (Gaussian likelihood, common practice)
        ssr = float(np.sum(r.residuals.raw ** 2))
        assert r.objective == pytest.approx(11 * np.log(2 * np.pi * ssr / 11) + 11, rel=1e-10)
        np.testing.assert_allclose(r.predict(r.residuals.time), r.residuals.predicted, rtol=1e-12)
        assert np.allclose(np.diag(r.correlation), 1.0)
        assert r.derived["half_life"].value == pytest.approx(np.log(2) / r.estimates["ke"])
        assert [s.name for s in r.stages][-1] == "likelihood"


class TestPreDoseSamples:
    """Theoph subject 1 has 0.74 mg/L at t = 0, before the dose is absorbed (a pre-dose level);
    the model predicts exactly 0 there, which proportional and log-normal error cannot fit."""

    def test_lognormal_leaves_it_out_and_equals_curve_fit_on_logs(self, theoph):
        """Log-normal error is least squares on log concentrations, so the estimates equal
        scipy.optimize.curve_fit of log(Bateman) on the samples after the dose (scipy as reference)."""
        s = theoph["1"]
        r = fit(s, "one-comp-oral", error="lognormal", seed=0, strategy=STRATEGY)
        assert r.ok and r.n_obs == s.times.size - 1
        assert any("at or before the first dose (t = 0 h: 0.74)" in w and "left out" in w for w in r.warnings)
        after = s.times > 0
        b = bateman(s.doses[0].amount)
        est = np.array([r.estimates[k] for k in ("ka", "ke", "V")])
        p, _ = curve_fit(lambda t, *q: np.log(b(t, *q)), s.times[after], np.log(s.values[after]),
                         p0=est * [1.2, 0.8, 1.1], xtol=1e-14, ftol=1e-14, maxfev=20000)
        np.testing.assert_allclose(est, p, rtol=1e-4)

    def test_proportional_leaves_it_out_and_equals_the_written_likelihood(self, theoph):
        """Proportional error: −2LL = Σ log(2π b² f²) + (y − f)²/(b² f²) (normal likelihood with
        sd = b·f, common practice), minimised over ka, ke, V, b by scipy.optimize.minimize on the
        samples after the dose; the fit's estimates agree to 1e-4."""
        from scipy.optimize import minimize

        s = theoph["1"]
        r = fit(s, "one-comp-oral", error="proportional", seed=0, strategy=STRATEGY)
        assert r.ok and r.n_obs == s.times.size - 1
        after = s.times > 0
        t, y = s.times[after], s.values[after]
        b = bateman(s.doses[0].amount)

        def m2ll(q):
            ka, ke, v, sd = np.exp(q)
            f = b(t, ka, ke, v)
            return float(np.sum(np.log(2 * np.pi * (sd * f) ** 2) + (y - f) ** 2 / (sd * f) ** 2))

        start = np.log([r.estimates["ka"] * 1.2, r.estimates["ke"] * 0.8, r.estimates["V"] * 1.1, 0.1])
        opt = minimize(m2ll, start, method="Nelder-Mead", options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20000})
        np.testing.assert_allclose([r.estimates[k] for k in ("ka", "ke", "V")], np.exp(opt.x[:3]), rtol=1e-4)
        assert r.objective == pytest.approx(opt.fun, abs=1e-6)

    def test_pooled_fit_names_every_subject_in_one_note(self, theoph):
        """Pooled subjects 1 and 2 (0.74 and 0 at t = 0): both rows left out, one note names both."""
        r = fit(theoph.subset(["1", "2"]), "one-comp-oral", error="proportional", pooled=True, strategy="nls")
        notes = [w for w in r.warnings if "left out of the fit" in w]
        assert r.n_obs == 20 and len(notes) == 1
        assert notes[0].startswith("2 samples") and "subject 1 t = 0 h: 0.74; subject 2 t = 0 h: 0)" in notes[0]

    def test_too_few_left_says_why(self):
        """Two samples, one of them pre-dose: under proportional error one is left, too few for two
        parameters; the refusal says that a sample was left out and how to keep it."""
        s = Subject(id="b", times=np.array([0.0, 2.0]), values=np.array([0.3, 4.0]), observables=(None,) * 2,
                    censored=np.zeros(2, bool), lloq=np.full(2, np.nan), rows=np.arange(2, 4),
                    doses=(Dose(0, 100, "iv"),), covariates={}, flags=())
        with pytest.raises(FitError, match=r"1 quantified observation\(s\) \(1 sample was at or before the first "
                                           r"dose, left out under proportional error; combined error keeps it\)"):
            fit(s, "one-comp-iv", error="proportional", strategy="nls")

    def test_a_model_with_a_baseline_keeps_it(self, theoph):
        """With an endogenous baseline (concentration = central/V + base) the prediction at t = 0 is
        base, not 0, so the pre-dose 0.74 is an ordinary observation under proportional error and
        nothing is left out (the check simulates, it does not assume; common practice)."""
        from template_texts import oral_template

        from compartments.template import parse_template

        text = oral_template("oral-baseline", "one-compartment oral with a baseline")
        text = text.replace('expression = "central / V"', 'expression = "central / V + base"').replace(
            "[equations]", '[parameters.base]\nunit = "mg/L"\ndefault = 0.5\nlower = 0.001\nupper = 100.0\n\n[equations]')
        r = fit(theoph["1"], parse_template(text), error="proportional", strategy="nls")
        assert r.ok and r.n_obs == theoph["1"].times.size
        assert not any("left out" in w for w in r.warnings)

    def test_additive_and_combined_keep_it(self, theoph):
        """Under additive or combined error a value where the model predicts 0 is an ordinary
        observation (the likelihood is defined there); nothing is left out."""
        s = theoph["1"]
        for error in ("additive", "combined"):
            r = fit(s, "one-comp-oral", error=error, seed=0, strategy="nls")
            assert r.n_obs == s.times.size
            assert not any("left out" in w for w in r.warnings)

    def test_zero_before_a_later_dose_is_left_out_under_proportional_error(self):
        """A zero at t = 0 before a dose at 1 h carries no information under proportional error
        (and would pull the error scale to 0); it is left out with a note, and the estimates
        equal the fit of the same data without that row (the data are noiseless; common practice)."""
        truth = {"ke": 0.2, "V": 10.0}
        times = np.array([2.0, 3.0, 5.0, 8.0, 12.0, 18.0])
        dose = Dose(1.0, 100.0, "iv")
        base = synthetic("one-comp-iv", truth, [dose], times)
        y = base.values * np.exp(0.05 * np.sin(np.arange(times.size)))  # fixed, deterministic scatter
        with_zero = Subject(id="z", times=np.r_[0.0, times], values=np.r_[0.0, y], observables=(None,) * 7,
                            censored=np.zeros(7, bool), lloq=np.full(7, np.nan), rows=np.arange(2, 9),
                            doses=(dose,), covariates={}, flags=())
        without = Subject(id="z", times=times, values=y, observables=(None,) * 6, censored=np.zeros(6, bool),
                          lloq=np.full(6, np.nan), rows=np.arange(3, 9), doses=(dose,), covariates={}, flags=())
        a = fit(with_zero, "one-comp-iv", error="proportional", strategy="nls")
        b = fit(without, "one-comp-iv", error="proportional", strategy="nls")
        assert a.n_obs == 6 and any("t = 0 h: 0)" in w for w in a.warnings)
        assert a.estimates == pytest.approx(b.estimates, rel=1e-10)
        assert a.error_parameters == pytest.approx(b.error_parameters, rel=1e-10)


def test_indometh_two_compartment_matches_biexponential(indometh_csv):
    """Indometh with the 25 mg IV dose supplied: two-comp-iv agrees with curve_fit on
    A·e^{−αt} + B·e^{−βt}, mapped to k21 = (Aβ + Bα)/(A + B), k10 = αβ/k21,
    k12 = α + β − k21 − k10, V1 = D/(A + B) (Gibaldi & Perrier 1982, ch. 2)."""
    study = read_study(indometh_csv, dose=25.0, route="iv")
    for sid in study.ids[:3]:
        s = study[sid]
        r = fit(s, "two-comp-iv", seed=1, strategy=STRATEGY)
        k = {n: r.estimates[n] for n in ("k10", "k12", "k21", "V1")}
        S = k["k10"] + k["k12"] + k["k21"]
        disc = np.sqrt(S * S - 4 * k["k10"] * k["k21"])
        a0, b0 = (S + disc) / 2, (S - disc) / 2
        A0 = 25 / k["V1"] * (a0 - k["k21"]) / (a0 - b0)
        B0 = 25 / k["V1"] * (k["k21"] - b0) / (a0 - b0)
        f = lambda t, A, al, B, be: A * np.exp(-al * t) + B * np.exp(-be * t)  # noqa: E731
        (A, al, B, be), _ = curve_fit(f, s.times, s.values, p0=[A0 * 1.1, a0 * 0.9, B0 * 0.9, b0 * 1.1],
                                      xtol=1e-14, ftol=1e-14, maxfev=50000)
        k21 = (A * be + B * al) / (A + B)
        k10 = al * be / k21
        ref = {"k10": k10, "k12": al + be - k21 - k10, "k21": k21, "V1": 25 / (A + B)}
        for n in ref:
            assert k[n] == pytest.approx(ref[n], rel=1e-3), (sid, n)


class TestRecovery:
    T = np.array([0.25, 0.6, 1.1, 2.0, 3.3, 5.0, 7.5, 10.0, 15.0, 24.0])

    @pytest.mark.parametrize(
        "template,truth,route",
        [
            ("one-comp-oral", {"ka": 2.2, "ke": 0.15, "V": 42.0}, "oral"),
            ("two-comp-iv", {"k10": 0.35, "k12": 0.6, "k21": 0.25, "V1": 8.0}, "iv"),
            ("two-comp-oral", {"ka": 1.6, "k10": 0.2, "k12": 0.5, "k21": 0.3, "V1": 15.0}, "oral"),
            ("one-comp-mm", {"Vmax": 30.0, "Km": 4.0, "V": 20.0}, "iv"),
        ],
    )
    def test_noiseless_recovery(self, template, truth, route):
        """Noiseless data from known parameters are recovered to ≤ 0.1 % (self-consistency of
        estimator and exact simulator; common practice for estimator checks)."""
        s = synthetic(template, truth, [Dose(0, 500, route)], self.T)
        r = fit(s, template, seed=3, strategy=STRATEGY)
        for k, v in truth.items():
            assert r.estimates[k] == pytest.approx(v, rel=1e-3), k

    def test_predator_prey_from_prey_counts_only(self):
        """Lotka–Volterra (Lotka 1925; Volterra 1926) with only the prey counted. Scaling the
        unseen predator by c leaves the prey curve unchanged when beta → beta/c (substitute
        y → c·y in the equations), so only beta·predator0 is identifiable: alpha, delta, gamma,
        prey0 and that product are recovered from noiseless data, and the fit says that beta
        and predator0 cannot be told apart."""
        truth = {"alpha": 0.9, "beta": 0.05, "delta": 0.02, "gamma": 0.6, "prey0": 40.0, "predator0": 9.0}
        times = np.linspace(0.5, 24, 16)
        s = synthetic("predator-prey", truth, [], times, observable="prey")
        r = fit(s, "predator-prey", seed=0, strategy=STRATEGY)
        for k in ("alpha", "delta", "gamma", "prey0"):
            assert r.estimates[k] == pytest.approx(truth[k], rel=1e-3), k
        assert r.estimates["beta"] * r.estimates["predator0"] == pytest.approx(0.05 * 9.0, rel=1e-3)
        flagged = [w for w in r.warnings if "cannot be identified" in w]
        assert flagged and "beta" in flagged[0] and "predator0" in flagged[0]

    def test_predator_prey_with_predator0_known(self):
        """With the initial predator count fixed at its known value, every other parameter is
        recovered from prey counts alone (same identity as above)."""
        truth = {"alpha": 0.9, "beta": 0.05, "delta": 0.02, "gamma": 0.6, "prey0": 40.0, "predator0": 9.0}
        times = np.linspace(0.5, 24, 16)
        s = synthetic("predator-prey", truth, [], times, observable="prey")
        r = fit(s, "predator-prey", seed=0, strategy=STRATEGY, fixed={"predator0": 9.0})
        for k in ("alpha", "beta", "delta", "gamma", "prey0"):
            assert r.estimates[k] == pytest.approx(truth[k], rel=1e-3), k
        assert not any("cannot be identified" in w for w in r.warnings)

    def test_flip_flop_warning(self):
        """Oral data with ka < ke: ka and ke can swap with an identical fit (the flip-flop
        identity of the Bateman function; Gibaldi & Perrier 1982): both solutions are
        reported, ka > ke is taken."""
        truth = {"ka": 0.08, "ke": 0.5, "V": 20.0}
        s = synthetic("one-comp-oral", truth, [Dose(0, 100, "oral")], self.T * 2)
        r = fit(s, "one-comp-oral", strategy=STRATEGY)
        assert any("Flip-flop" in w for w in r.warnings)
        assert r.estimates["ka"] == pytest.approx(0.5, rel=1e-3)
        assert r.estimates["ke"] == pytest.approx(0.08, rel=1e-3)
        alt = r.alternatives[0]
        assert alt["ka"] == pytest.approx(0.08, rel=1e-3) and alt["V"] == pytest.approx(20.0, rel=1e-3)


class TestErrorModels:
    T = np.array([0.3, 0.8, 1.5, 2.5, 4.0, 6.0, 8.0, 11.0, 16.0, 24.0, 36.0, 48.0])
    truth = {"ka": 1.3, "ke": 0.12, "V": 25.0}

    @pytest.mark.parametrize("error", ["additive", "proportional", "combined", "lognormal"])
    def test_gradient_of_neg2ll(self, error):
        """∂(−2LL)/∂f and ∂/∂η equal finite differences (scipy.optimize.check_grad)."""
        rng = np.random.default_rng(1)
        y = rng.uniform(0.5, 3, 12)
        f0 = y * rng.uniform(0.8, 1.2, 12)
        k = np.zeros(12, np.int64)
        cens = np.zeros(12, bool)
        cens[[2, 7]] = True
        ne = 2 if error == "combined" else 1
        eta = np.log(np.full(ne, 0.3))

        def val(x):
            return neg2ll(error, y, x[:12], x[12:], k, cens).value

        def grad(x):
            t = neg2ll(error, y, x[:12], x[12:], k, cens)
            return np.concatenate([t.d_f, t.d_eta])

        assert check_grad(val, grad, np.concatenate([f0, eta]), epsilon=1e-7) < 1e-4

    @pytest.mark.parametrize("error", ["proportional", "combined", "lognormal"])
    def test_recovery_with_noise(self, error):
        """10 % proportional noise, 12 samples: estimates within 3 SE of truth (a coverage
        statement at the 99.7 % level; common practice)."""
        s = synthetic("one-comp-oral", self.truth, [Dose(0, 300, "oral")], self.T, noise=0.1, seed=4)
        r = fit(s, "one-comp-oral", error=error, strategy=STRATEGY)
        assert r.ok
        for k, v in self.truth.items():
            assert abs(r.estimates[k] - v) < 3 * r.se[k], (k, r.estimates[k], r.se[k])
        cv = [v for n, v in r.error_parameters.items() if n.startswith(("cv_", "sdlog_"))]
        assert 0.03 < cv[0] < 0.25

    def test_censored_values_use_the_normal_cdf(self):
        """Below-LLOQ values enter through Φ((LLOQ − f)/σ) (Beal 2001, method M3): the fit
        with censoring lands nearer the truth than one that drops them, on the same draw."""
        s = synthetic("one-comp-oral", self.truth, [Dose(0, 300, "oral")], self.T, noise=0.1, seed=7,
                      lloq=2.5)
        assert s.censored.sum() >= 3
        r = fit(s, "one-comp-oral", error="proportional", strategy=STRATEGY)
        keep = ~s.censored
        dropped = Subject(id="d", times=s.times[keep], values=s.values[keep], observables=tuple(np.array(s.observables)[keep]),
                          censored=s.censored[keep], lloq=s.lloq[keep], rows=s.rows[keep], doses=s.doses,
                          covariates={}, flags=())
        r2 = fit(dropped, "one-comp-oral", error="proportional", strategy=STRATEGY)
        assert abs(np.log(r.estimates["ke"] / 0.12)) < abs(np.log(r2.estimates["ke"] / 0.12))


class TestWarningsAndRefusals:
    def test_too_few_observations_refused(self):
        """Fewer quantified observations than parameters: refused with the reason."""
        s = synthetic("two-comp-oral", {"ka": 1, "k10": 0.1, "k12": 0.2, "k21": 0.1, "V1": 10},
                      [Dose(0, 100, "oral")], np.array([1.0, 4.0, 8.0]))
        with pytest.raises(FitError, match="cannot determine"):
            fit(s, "two-comp-oral", strategy="nls")

    def test_non_identifiable_flagged(self):
        """All samples at one time: ke and V cannot both be identified (singular Fisher
        information)."""
        s = synthetic("one-comp-iv", {"ke": 0.2, "V": 10.0}, [Dose(0, 100, "iv")], np.array([2.0, 2.0, 2.0, 2.0]),
                      noise=0.05, seed=2)
        r = fit(s, "one-comp-iv", strategy="nls")
        assert any("cannot be identified" in w for w in r.warnings)

    def test_same_seed_same_numbers(self):
        """Deterministic: the same data and seed give identical results."""
        s = synthetic("two-comp-oral", {"ka": 1.6, "k10": 0.2, "k12": 0.5, "k21": 0.3, "V1": 15.0},
                      [Dose(0, 500, "oral")], TestRecovery.T, noise=0.1, seed=5)
        a = fit(s, "two-comp-oral", error="proportional", seed=11)
        b = fit(s, "two-comp-oral", error="proportional", seed=11)
        assert a.estimates == b.estimates and a.se == b.se and a.objective == b.objective


def test_profile_and_bootstrap_agree_with_wald_for_a_well_determined_parameter():
    """For a well-determined parameter the profile-likelihood interval and parametric
    bootstrap SE are close to the Wald ones (asymptotic equivalence; Bates & Watts 1988, §6)."""
    s = synthetic("one-comp-iv", {"ke": 0.2, "V": 10.0}, [Dose(0, 100, "iv")],
                  np.array([0.5, 1, 2, 3, 4, 6, 8, 10, 12, 16, 20, 24.0]), noise=0.03, seed=8)
    r = fit(s, "one-comp-iv", error="proportional", strategy="nls", profile=True, bootstrap=60, seed=2)
    lo, hi = r.profiles["ke"].ci
    wlo, whi = r.ci["ke"]
    assert lo == pytest.approx(wlo, rel=0.05) and hi == pytest.approx(whi, rel=0.05)
    assert r.bootstrap["se"]["ke"] == pytest.approx(r.se["ke"], rel=0.35)


def test_ci_coverage_smoke():
    """Smoke run of the coverage study (full study in benchmarks/estimator.py): 95 % intervals
    of ke cover the truth in most of 30 replicates (binomial: ≥ 24 of 30 at 95 % nominal has
    probability > 0.99; common practice)."""
    truth = {"ka": 1.3, "ke": 0.12, "V": 25.0}
    T = TestErrorModels.T
    hits = 0
    for rep in range(30):
        s = synthetic("one-comp-oral", truth, [Dose(0, 300, "oral")], T, noise=0.1, seed=100 + rep)
        r = fit(s, "one-comp-oral", error="proportional", strategy="nls")
        lo, hi = r.ci["ke"]
        hits += lo <= 0.12 <= hi
    assert hits >= 24


def test_lognormal_one_compartment_iv_is_a_straight_line():
    """With log-normal error, log C = log(D/V) − ke·t is a straight line, so the fit's ke, its
    SE (residual variance on n − 2 degrees of freedom) and its profile-likelihood interval
    must equal the slope, its standard error and its t-interval from ordinary linear
    regression (scipy.stats.linregress as reference; the profile interval is exact here
    because the model is linear in log V and ke; Bates & Watts 1988, §6.1)."""
    from scipy import stats

    times = np.array([0.5, 1, 2, 3, 5, 7, 10, 14, 18, 24.0])
    rng = np.random.default_rng(21)
    conc = 100 / 12.0 * np.exp(-0.15 * times) * np.exp(0.12 * rng.standard_normal(times.size))
    s = Subject(id="L", times=times, values=conc, observables=(None,) * times.size,
                censored=np.zeros(times.size, bool), lloq=np.full(times.size, np.nan),
                rows=np.arange(2, times.size + 2), doses=(Dose(0, 100, "iv"),), covariates={}, flags=())
    r = fit(s, "one-comp-iv", error="lognormal", strategy="nls", profile=True)
    line = stats.linregress(times, np.log(conc))
    assert r.estimates["ke"] == pytest.approx(-line.slope, rel=1e-6)
    assert r.estimates["V"] == pytest.approx(100 / np.exp(line.intercept), rel=1e-6)
    assert r.se["ke"] == pytest.approx(line.stderr, rel=1e-4)
    q = stats.t.ppf(0.975, times.size - 2)
    lo, hi = r.profiles["ke"].ci
    assert lo == pytest.approx(-line.slope - q * line.stderr, rel=1e-3)
    assert hi == pytest.approx(-line.slope + q * line.stderr, rel=1e-3)


class TestWaldIntervalCheck:
    """The fit evaluates −2LL at the ends of each Wald interval and says when an end lies well
    inside the region the likelihood supports."""

    truth = {"ka": 6.0, "ke": 0.1, "V": 20.0}

    def test_unsampled_absorption_phase_is_flagged(self):
        """First sample at 3 h with ka = 6 1/h: the absorption term e^(−ka·t) of the Bateman
        function is below 1e-7 at every sample, so the data cannot bound ka from above (Bateman
        1910; common practice). Every replicate must say so: either ka is poorly determined, or,
        where noise happened to give a finite-looking optimum, the upper end of its interval is
        flagged as too narrow (seed 0 is such a draw)."""
        times = np.array([3, 4, 6, 8, 10, 14, 18, 24, 30, 36.0])
        for seed in range(4):
            s = synthetic("one-comp-oral", self.truth, [Dose(0, 300, "oral")], times, noise=0.1, seed=seed)
            r = fit(s, "one-comp-oral", error="proportional", strategy=STRATEGY)
            narrow = any("interval of ka is too narrow on its upper side" in w for w in r.warnings)
            poor = any(w.startswith("ka is poorly determined") for w in r.warnings)
            assert narrow or poor, (seed, r.warnings)
            if seed == 0:
                assert narrow and not poor and r.ci["ka"][1] < self.truth["ka"]

    def test_well_sampled_design_is_not_flagged(self):
        """Samples through absorption, peak and four half-lives, 3 % noise: the likelihood is
        close to quadratic (asymptotic normality; Bates & Watts 1988, §2.3), no interval flagged."""
        times = np.array([0.05, 0.1, 0.2, 0.3, 0.5, 0.8, 1.2, 2, 4, 8, 12, 18, 24, 30.0])
        s = synthetic("one-comp-oral", self.truth, [Dose(0, 300, "oral")], times, noise=0.03, seed=1)
        r = fit(s, "one-comp-oral", error="proportional", strategy=STRATEGY)
        assert not any("too narrow" in w for w in r.warnings), r.warnings


    def test_a_point_short_of_the_optimum_is_called_so(self, monkeypatch):
        """A likelihood stage that reports, as converged, a point 2 SE from the optimum along the
        ke profile path (φ + 2·SE·cov[:, ke]/var(ke)): the end of the ke interval towards the optimum
        has a lower −2LL than the reported point (for a quadratic likelihood: (1.96 − 2)² − 2² < 0;
        Bates & Watts 1988, §2.3), and the fit must say that it stopped short there instead of calling
        that end "too narrow"."""
        from compartments.estimate import hybrid

        times = np.array([0.25, 0.5, 1, 1.5, 2, 3, 4, 6, 8, 12, 18, 24.0])
        s = synthetic("one-comp-oral", {"ka": 1.0, "ke": 0.1, "V": 20.0}, [Dose(0, 300, "oral")], times,
                      noise=0.05, seed=2)
        good = fit(s, "one-comp-oral", error="proportional", strategy="nls")
        real_run = hybrid.LikelihoodStage.run

        def short(self, problem, starts):
            res = real_run(self, problem, starts)
            j = problem.names.index("ke")
            C = good.covariance
            phi = res.phi + 2.0 * np.sqrt(C[j, j]) * C[: res.phi.size, j] / C[j, j]
            value, eta, _ = problem.moment_objective(phi)
            return replace(res, phi=phi, objective=value, extra={**res.extra, "eta": eta})

        monkeypatch.setattr(hybrid.LikelihoodStage, "run", short)
        r = fit(s, "one-comp-oral", error="proportional", strategy="nls")
        assert r.objective > good.objective + 1.0
        assert any("lower end of the 95 % interval of ke" in w and "stopped short of the optimum" in w
                   for w in r.warnings), r.warnings
        assert not any("interval of ke is too narrow" in w for w in r.warnings)


class TestNewtonPolish:
    """The last steps of the likelihood fit (compartments.estimate.nls.newton_polish)."""

    def test_rosenbrock_valley(self):
        """Rosenbrock's curved valley from the classic start (−1.2, 1): the minimum is at (1, 1)
        (Rosenbrock 1960; scipy.optimize.rosen and rosen_der as reference)."""
        from scipy.optimize import rosen, rosen_der

        from compartments.estimate.nls import newton_polish

        x0 = np.array([-1.2, 1.0])
        x, fx, _, converged = newton_polish(lambda z: (rosen(z), rosen_der(z)), x0, rosen(x0),
                                            np.full(2, -5.0), np.full(2, 5.0), max_iter=100)
        assert converged
        np.testing.assert_allclose(x, [1.0, 1.0], atol=1e-6)
        assert fx < 1e-12

    def test_flat_valley_converges_in_the_value(self):
        """f = (x − 1)² + 1e-8·y⁴ is nearly flat along y: Newton shrinks y by a third per step
        (y ← 2y/3 for a quartic, by hand), so the value settles long before y reaches 0; the
        polish must stop there as converged within a few steps rather than spend its budget
        (the direction is left to the uncertainty step to flag)."""
        from compartments.estimate.nls import newton_polish

        def fg(z):
            return (z[0] - 1) ** 2 + 1e-8 * z[1] ** 4, np.array([2 * (z[0] - 1), 4e-8 * z[1] ** 3])

        x0 = np.array([3.0, 2.0])
        x, fx, nit, converged = newton_polish(fg, x0, fg(x0)[0], np.full(2, -10.0), np.full(2, 10.0))
        assert converged and nit < 12
        assert x[0] == pytest.approx(1.0, abs=1e-8) and fx < 2e-7 and 0.05 < x[1] < 2.0
