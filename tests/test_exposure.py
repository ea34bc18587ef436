"""Exposure read off a fitted curve, and the curve's confidence band.

References: closed forms of the one- and two-compartment models in Gibaldi & Perrier,
Pharmacokinetics, 2nd ed. (1982), ch. 1–4 and 11 (AUC = F·Dose/CL, oral Tmax and Cmax,
MRT = 1/ka + 1/ke, Vss/CL); superposition for repeated doses of a linear model (same
book, ch. 3); the delta method against a Monte Carlo of the parameter distribution.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from compartments import Dose, load_template
from compartments.exposure import curve_exposure, exposure, fitted_curve
from compartments.results import FitResult


def result_for(name: str, params: dict[str, float], doses: list[Dose], *, cov_phi: np.ndarray | None = None,
               estimated: tuple[str, ...] | None = None, last_time: float = 24.0) -> FitResult:
    """A successful FitResult at known parameters (no fitting), for exact checks."""
    t = load_template(name)
    est_names = estimated or tuple(p.name for p in t.parameters if not p.fixed)
    theta = {p.name: params.get(p.name, p.default) for p in t.parameters}
    k = len(est_names)
    cov = cov_phi if cov_phi is not None else np.zeros((k, k))
    return FitResult(
        template=t.name, subject="s", status="ok", message="", error_model="additive",
        parameter_names=est_names, units={p.name: p.unit for p in t.parameters},
        estimates={n: theta[n] for n in est_names}, se={n: 0.0 for n in est_names}, rse={n: 0.0 for n in est_names},
        ci={n: (theta[n], theta[n]) for n in est_names},
        fixed={n: v for n, v in theta.items() if n not in est_names}, error_parameters={"sd_concentration": 0.1},
        covariance=cov, correlation=np.eye(k), covariance_method="test", objective=0.0, aic=0.0, aicc=0.0,
        bic=0.0, n_obs=8, n_params=k + 1, residuals=None, derived={}, stages=(), warnings=(), seed=0,
        strategy="nls", versions={}, wall_time=0.0, doses={"s": tuple(doses)}, model_template=t,
    )


class TestTextbookIdentities:
    def test_one_comp_oral(self) -> None:
        """AUC0–∞ = F·Dose/(V·ke), Tmax = ln(ka/ke)/(ka − ke), Cmax = F·Dose/V·e^(−ke·Tmax),
        MRT = 1/ka + 1/ke, terminal t½ = ln 2/ke (Gibaldi & Perrier 1982, ch. 1 and 11; F = 1)."""
        ka, ke, V, D = 1.5, 0.08, 30.0, 320.0
        e = exposure(result_for("one-comp-oral", {"ka": ka, "ke": ke, "V": V}, [Dose(0, D, "oral")]),
                     last_time=24.0)
        tmax = math.log(ka / ke) / (ka - ke)
        assert e.auc_inf == pytest.approx(D / (V * ke), rel=1e-7)
        assert e.tmax == pytest.approx(tmax, rel=1e-6)
        assert e.cmax == pytest.approx(D / V * math.exp(-ke * tmax), rel=1e-9)
        assert e.mrt == pytest.approx(1 / ka + 1 / ke, rel=1e-7)
        assert e.half_life == pytest.approx(math.log(2) / ke, rel=1e-6)
        assert e.unit == "mg/L" and e.time_unit == "h"
        assert e.as_dict()["auc_inf"]["unit"] == "mg/L·h"

    def test_one_comp_oral_flip_flop_terminal_phase(self) -> None:
        """With ka < ke the terminal slope is ka (flip-flop), AUC still Dose/(V·ke)
        (Gibaldi & Perrier 1982, ch. 1)."""
        ka, ke, V, D = 0.05, 0.4, 10.0, 100.0
        e = exposure(result_for("one-comp-oral", {"ka": ka, "ke": ke, "V": V}, [Dose(0, D, "oral")]))
        assert e.auc_inf == pytest.approx(D / (V * ke), rel=1e-7)
        assert e.half_life == pytest.approx(math.log(2) / ka, rel=1e-6)

    def test_iv_bolus(self) -> None:
        """IV bolus: Cmax = Dose/V at t = 0, AUC = Dose/(V·ke), MRT = 1/ke (Gibaldi & Perrier 1982, ch. 1)."""
        ke, V, D = 0.2, 12.0, 600.0
        e = exposure(result_for("one-comp-iv", {"ke": ke, "V": V}, [Dose(0, D, "iv")]))
        assert e.cmax == pytest.approx(D / V, rel=1e-6)
        assert e.tmax == pytest.approx(0.0, abs=1e-6)
        assert e.auc_inf == pytest.approx(D / (V * ke), rel=1e-7)
        assert e.mrt == pytest.approx(1 / ke, rel=1e-7)

    def test_infusion(self) -> None:
        """Zero-order infusion over T: Cmax = R/(V·ke)·(1 − e^(−ke·T)) at the end, AUC = Dose/(V·ke),
        MRT (less T/2) = 1/ke (Gibaldi & Perrier 1982, ch. 2 and 11)."""
        ke, V, D, T = 0.3, 20.0, 500.0, 2.0
        e = exposure(result_for("one-comp-iv", {"ke": ke, "V": V}, [Dose(0, D, "infusion", duration=T)]))
        R = D / T
        assert e.cmax == pytest.approx(R / (V * ke) * (1 - math.exp(-ke * T)), rel=1e-6)
        assert e.tmax == pytest.approx(T, abs=1e-6)
        assert e.auc_inf == pytest.approx(D / (V * ke), rel=1e-7)
        assert e.mrt == pytest.approx(1 / ke, rel=1e-6)

    def test_two_comp_iv(self) -> None:
        """Two compartments: AUC = Dose/(V1·k10), MRT = Vss/CL = (1 + k12/k21)/k10, terminal rate
        β = [(k10+k12+k21) − sqrt((k10+k12+k21)² − 4·k10·k21)]/2 (Gibaldi & Perrier 1982, ch. 2)."""
        k10, k12, k21, V1, D = 0.25, 0.6, 0.15, 8.0, 100.0
        e = exposure(result_for("two-comp-iv", {"k10": k10, "k12": k12, "k21": k21, "V1": V1}, [Dose(0, D, "iv")]))
        s = k10 + k12 + k21
        beta = (s - math.sqrt(s * s - 4 * k10 * k21)) / 2
        assert e.auc_inf == pytest.approx(D / (V1 * k10), rel=1e-7)
        assert e.mrt == pytest.approx((1 + k12 / k21) / k10, rel=1e-6)
        assert e.half_life == pytest.approx(math.log(2) / beta, rel=1e-5)

    @pytest.mark.parametrize("dose", [100.0, 2000.0])
    def test_michaelis_menten_bolus(self, dose: float) -> None:
        """Michaelis–Menten elimination after an IV bolus: AUC0–∞ = C0·(C0/2 + Km)/(Vmax/V), and
        the terminal (first-order) rate is Vmax/(V·Km) (Wagner 1973; Gibaldi & Perrier 1982, ch. 7)."""
        vmax, km, V = 20.0, 5.0, 40.0
        e = exposure(result_for("one-comp-mm", {"Vmax": vmax, "Km": km, "V": V}, [Dose(0, dose, "iv")]))
        c0 = dose / V
        assert e.auc_inf == pytest.approx(c0 * (c0 / 2 + km) / (vmax / V), rel=1e-6)
        assert e.lambda_z == pytest.approx(vmax / (V * km), rel=1e-3)

    def test_lag_time_shifts_tmax_only(self) -> None:
        """A lag shifts the curve: Tmax grows by tlag, AUC is unchanged, MRT grows by tlag
        (Gibaldi & Perrier 1982, ch. 1)."""
        p = {"ka": 1.2, "ke": 0.1, "V": 30.0}
        base = exposure(result_for("one-comp-oral", p, [Dose(0, 300, "oral")]))
        lagged = exposure(result_for("one-comp-oral", {**p, "tlag": 0.75}, [Dose(0, 300, "oral")]))
        assert lagged.tmax == pytest.approx(base.tmax + 0.75, rel=1e-6)
        assert lagged.auc_inf == pytest.approx(base.auc_inf, rel=1e-7)
        assert lagged.mrt == pytest.approx(base.mrt + 0.75, rel=1e-6)

    def test_repeated_doses_superpose(self) -> None:
        """Linear model, n doses: AUC0–∞ = n·Dose/(V·ke) (superposition, Gibaldi & Perrier 1982, ch. 3);
        MRT is left out with a note."""
        ke, V, D = 0.1, 30.0, 300.0
        doses = [Dose(12.0 * i, D, "oral") for i in range(3)]
        e = exposure(result_for("one-comp-oral", {"ka": 1.2, "ke": ke, "V": V}, doses))
        assert e.auc_inf == pytest.approx(3 * D / (V * ke), rel=1e-7)
        assert e.mrt is None and any("single dose" in n for n in e.notes)

    def test_curve_that_does_not_decay(self) -> None:
        """A plateau has no AUC0–∞: None with a plain note, Cmax still the plateau."""
        e = curve_exposure(lambda t: np.where(t > 0, 2.0, 0.0), [0.0], origin=0.0, last_time=10.0, single_dose=True)
        assert e.auc_inf is None and e.mrt is None and e.half_life is None
        assert e.cmax == pytest.approx(2.0)
        assert "does not fall towards zero" in e.notes[0]

    def test_not_for_biology_or_failed(self) -> None:
        """Exposure applies to PK templates with doses only."""
        assert exposure(result_for("predator-prey", {}, [])) is None


class TestBand:
    def test_delta_band_matches_monte_carlo(self) -> None:
        """The 95 % band of the one-compartment oral curve agrees with the 2.5/97.5 % quantiles of
        the Bateman function under parameter draws from the same (log-scale) covariance
        (delta method vs Monte Carlo; Bateman function, Gibaldi & Perrier 1982, ch. 1)."""
        ka, ke, V, D = 1.5, 0.1, 30.0, 300.0
        sd = np.array([0.08, 0.05, 0.04])  # SD of log ka, log ke, log V
        corr = np.array([[1.0, 0.3, 0.2], [0.3, 1.0, -0.4], [0.2, -0.4, 1.0]])
        cov = corr * np.outer(sd, sd)
        r = result_for("one-comp-oral", {"ka": ka, "ke": ke, "V": V}, [Dose(0, D, "oral")], cov_phi=cov,
                       estimated=("ka", "ke", "V"))
        times = np.array([0.5, 1.0, 2.0, 4.0, 8.0, 16.0, 24.0])
        c = fitted_curve(r, times)
        rng = np.random.default_rng(0)
        draws = np.exp(np.log([ka, ke, V]) + rng.multivariate_normal(np.zeros(3), cov, size=40000))
        a, k, v = draws[:, :1], draws[:, 1:2], draws[:, 2:3]
        mc = D * a / (v * (a - k)) * (np.exp(-k * times) - np.exp(-a * times))
        lo, hi = np.quantile(mc, [0.025, 0.975], axis=0)
        bateman = D * ka / (V * (ka - ke)) * (np.exp(-ke * times) - np.exp(-ka * times))
        np.testing.assert_allclose(c.predicted, bateman, rtol=1e-8)
        np.testing.assert_allclose(c.lower, lo, rtol=0.02)
        np.testing.assert_allclose(c.upper, hi, rtol=0.02)
        assert np.all(c.lower < c.predicted) and np.all(c.predicted < c.upper)

    def test_no_covariance_no_band(self) -> None:
        """Without a usable covariance the band collapses onto the curve (the fit's warnings say why)."""
        nan = np.full((3, 3), np.nan)
        r = result_for("one-comp-oral", {"ka": 1.5, "ke": 0.1, "V": 30.0}, [Dose(0, 300, "oral")], cov_phi=nan,
                       estimated=("ka", "ke", "V"))
        c = fitted_curve(r, [1.0, 2.0])
        np.testing.assert_array_equal(c.lower, c.predicted)
        np.testing.assert_array_equal(c.upper, c.predicted)
