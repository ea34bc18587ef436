"""Steady-state dose records and additional doses in simulation, against closed forms and scipy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from template_texts import oral_template

from compartments import Dose, load_template
from compartments.engine import periodic
from compartments.errors import SimulationError, UsageError
from compartments.model import compile_model, compiled
from compartments.simulate import simulate
from compartments.template import parse_template

IV = compiled(load_template("one-comp-iv"))
ORAL = compiled(load_template("one-comp-oral"))
TWO_ORAL = compiled(load_template("two-comp-oral"))
MM = compiled(load_template("one-comp-mm"))


def obs(model, params, doses, t, **kw):
    return simulate(model, params, doses, np.asarray(t, dtype=float), **kw).observable()


class TestClosedForms:
    """Multiple-dose formulas of Gibaldi & Perrier, Pharmacokinetics, 2nd ed. (1982), ch. 3."""

    def test_iv_bolus_accumulation(self):
        """One compartment, IV bolus D every τ at steady state: Cmax,ss = D/V/(1 − e^{−keτ}),
        Cmin,ss = Cmax,ss·e^{−keτ}, C(t) = Cmax,ss·e^{−ke t} within the interval."""
        ke, V, D, tau, t0 = 0.15, 12.0, 250.0, 8.0, 30.0
        s = np.array([0.0, 1e-7, 1.0, 3.5, 7.999])
        c = obs(IV, {"ke": ke, "V": V}, [Dose(t0, D, interval=tau, steady_state=True)], t0 + s)
        cmax = D / V / (1 - np.exp(-ke * tau))
        np.testing.assert_allclose(c[0], cmax * np.exp(-ke * tau), rtol=1e-12)  # pre-dose: the trough
        np.testing.assert_allclose(c[1:], cmax * np.exp(-ke * s[1:]), rtol=1e-12)

    def test_oral_bateman_superposition(self):
        """Oral dosing at steady state: C = F·D·ka/(V(ka − ke))·[e^{−ke t}/(1 − e^{−keτ})
        − e^{−ka t}/(1 − e^{−kaτ})] (superposition of Bateman functions)."""
        ka, ke, V, D, tau, t0 = 1.4, 0.12, 30.0, 400.0, 12.0, 100.0
        s = np.array([0.0, 0.5, 1.0, 2.0, 4.0, 8.0, 11.9])
        c = obs(ORAL, {"ka": ka, "ke": ke, "V": V}, [Dose(t0, D, "oral", interval=tau, steady_state=True)], t0 + s)
        ref = D * ka / (V * (ka - ke)) * (np.exp(-ke * s) / (1 - np.exp(-ke * tau))
                                          - np.exp(-ka * s) / (1 - np.exp(-ka * tau)))
        np.testing.assert_allclose(c, ref, rtol=1e-11)

    def test_intermittent_infusion(self):
        """Infusion at rate R for T hours every τ at steady state: during the infusion
        C = R/CL·(1 − e^{−ke t}) + Cmin,ss·e^{−ke t}, afterwards Cmax,ss·e^{−ke(t − T)}, with
        Cmax,ss = R/CL·(1 − e^{−keT})/(1 − e^{−keτ}) and Cmin,ss = Cmax,ss·e^{−ke(τ − T)}."""
        ke, V, R, T, tau, t0 = 0.3, 8.0, 60.0, 1.5, 6.0, 24.0
        m = compiled(load_template("one-comp-infusion"))
        s = np.array([0.0, 0.5, 1.5, 2.0, 4.0, 5.99])
        c = obs(m, {"ke": ke, "V": V}, [Dose(t0, R * T, "infusion", duration=T, interval=tau, steady_state=True)],
                t0 + s)
        CL = ke * V
        cmax = R / CL * (1 - np.exp(-ke * T)) / (1 - np.exp(-ke * tau))
        cmin = cmax * np.exp(-ke * (tau - T))
        ref = np.where(s <= T, R / CL * (1 - np.exp(-ke * s)) + cmin * np.exp(-ke * s), cmax * np.exp(-ke * (s - T)))
        np.testing.assert_allclose(c, ref, rtol=1e-11)

    def test_continuous_infusion_plateau(self):
        """An infusion as long as its interval at steady state is the plateau R/CL, for as long as
        the infusions go on (textbook plateau of a constant-rate infusion)."""
        ke, V, R, tau = 0.2, 15.0, 30.0, 12.0
        m = compiled(load_template("one-comp-iv"))
        c = obs(m, {"ke": ke, "V": V}, [Dose(10.0, R * tau, "infusion", rate=R, interval=tau, additional=2,
                                             steady_state=True)], [10.0, 15.0, 22.0, 40.0])
        np.testing.assert_allclose(c, R / (ke * V), rtol=1e-11)


def explicit_history(dose: Dose, periods: int) -> list[Dose]:
    """The regimen of a steady-state record listed for ``periods`` intervals before it."""
    tau = dose.interval
    past = [Dose(dose.time - k * tau, dose.amount, dose.route, duration=dose.duration, rate=dose.rate)
            for k in range(periods, 0, -1)]
    return past + Dose(dose.time, dose.amount, dose.route, duration=dose.duration, rate=dose.rate,
                       interval=dose.interval, additional=dose.additional).expanded()


P2 = {"ka": 0.9, "k10": 0.25, "k12": 0.4, "k21": 0.3, "V1": 20.0}


class TestLinearAgainstLongHistories:
    @pytest.mark.parametrize("tlag", [0.0, 2.5, 14.0])
    def test_oral_with_lag_equals_many_doses(self, tlag):
        """two-comp-oral at steady state, lag shorter and longer than τ, equals 150 listed doses
        before the record (the series has converged to 1e-14 by then)."""
        t0, tau = 2000.0, 12.0
        d = Dose(t0, 100.0, "oral", interval=tau, steady_state=True, additional=1)
        t = t0 + np.array([0.0, 1.0, 3.0, 12.0, 13.0, 20.0, 40.0])
        p = dict(P2, tlag=tlag)
        a = obs(TWO_ORAL, p, [d], t)
        b = obs(TWO_ORAL, p, explicit_history(d, 150), t)
        np.testing.assert_allclose(a, b, rtol=1e-10)

    @pytest.mark.parametrize("duration", [2.0, 12.0, 20.0])
    def test_infusion_equals_many_doses(self, duration):
        """Infusions shorter than, as long as and longer than τ at steady state equal the listed history."""
        m = compiled(load_template("two-comp-iv"))
        t0, tau = 1500.0, 12.0
        d = Dose(t0, 300.0, "infusion", duration=duration, interval=tau, steady_state=True)
        t = t0 + np.array([0.0, 1.0, 2.0, 5.0, 11.0, 25.0])
        p = {"k10": 0.3, "k12": 0.5, "k21": 0.2, "V1": 10.0}
        np.testing.assert_allclose(obs(m, p, [d], t), obs(m, p, explicit_history(d, 120), t), rtol=1e-10)

    def test_sensitivities_equal_finite_differences(self):
        """∂C/∂θ at steady state (with a lag) equals central differences of the simulation."""
        d = [Dose(50.0, 100.0, "oral", interval=8.0, steady_state=True, additional=2)]
        t = np.array([50.0, 51.0, 53.0, 58.5, 70.0])
        th = TWO_ORAL.param_vector(dict(P2, tlag=0.7))
        J = simulate(TWO_ORAL, th, d, t, sensitivities=True).sensitivity()
        for j in range(th.size):
            h = 1e-6 * max(1.0, abs(th[j]))
            up, dn = th.copy(), th.copy()
            up[j] += h
            dn[j] -= h
            fd = (obs(TWO_ORAL, up, d, t) - obs(TWO_ORAL, dn, d, t)) / (2 * h)
            np.testing.assert_allclose(J[:, j], fd, rtol=1e-6, atol=1e-9 * np.abs(fd).max(),
                                       err_msg=TWO_ORAL.parameter_names[j])


class TestRecordRules:
    def test_earlier_records_are_replaced(self):
        """From a steady-state record on, earlier records no longer count; before it, they alone do."""
        ss = Dose(48.0, 100.0, interval=12.0, steady_state=True)
        p = {"ke": 0.1, "V": 10.0}
        t = np.array([10.0, 47.0, 48.0, 50.0, 70.0])
        alone = obs(IV, p, [ss], t)
        both = obs(IV, p, [Dose(0.0, 500.0, interval=12.0, additional=10), ss], t)
        np.testing.assert_array_equal(alone[2:], both[2:])
        np.testing.assert_allclose(both[:2], obs(IV, p, [Dose(0.0, 500.0, interval=12.0, additional=10)], t[:2]),
                                   rtol=1e-15)
        assert np.all(alone[:2] == 0.0)

    def test_records_at_the_same_time_add(self):
        """A plain dose at the steady-state record's time adds to it (superposition)."""
        p = {"ke": 0.1, "V": 10.0}
        t = np.array([60.0, 61.0, 65.0])
        ss = Dose(60.0, 100.0, interval=12.0, steady_state=True)
        np.testing.assert_allclose(obs(IV, p, [ss, Dose(60.0, 40.0)], t),
                                   obs(IV, p, [ss], t) + obs(IV, p, [Dose(60.0, 40.0)], t) * (t > 60), rtol=1e-13)

    def test_two_steady_state_records_at_one_time_refused(self):
        """Which regimen holds would be ambiguous: refused with one line."""
        with pytest.raises(UsageError, match="two steady-state dose records at time 5"):
            simulate(IV, None, [Dose(5.0, 1.0, interval=6.0, steady_state=True),
                                Dose(5.0, 2.0, interval=8.0, steady_state=True)], [6.0])

    def test_additional_doses_equal_the_listed_ones(self):
        """``additional`` doses simulate exactly as the same doses listed one by one."""
        d = Dose(1.0, 80.0, "oral", interval=6.0, additional=5)
        t = np.linspace(0.0, 48.0, 17)
        np.testing.assert_array_equal(obs(TWO_ORAL, P2, [d], t), obs(TWO_ORAL, P2, d.expanded(), t))

    def test_baseline_input_is_part_of_the_steady_state(self):
        """With a zero-order production kin the steady state adds the baseline kin/ke
        (superposition; a turnover model at its baseline)."""
        text = oral_template("oral-turnover", "one-compartment oral with production").replace(
            'central = "ka*depot - ke*central"', 'central = "ka*depot - ke*central + kin"').replace(
            "[equations]", '[parameters.kin]\nunit = "mg/h"\ndefault = 2.0\nlower = 0.001\nupper = 100.0\n\n[equations]')
        m = compile_model(parse_template(text))
        ka, ke, V, kin, D, tau = 1.0, 0.1, 30.0, 2.0, 100.0, 12.0
        s = np.array([0.0, 2.0, 6.0])
        c = obs(m, {"ka": ka, "ke": ke, "V": V, "kin": kin}, [Dose(24.0, D, "oral", interval=tau, steady_state=True)],
                24.0 + s)
        ref = D * ka / (V * (ka - ke)) * (np.exp(-ke * s) / (1 - np.exp(-ke * tau))
                                          - np.exp(-ka * s) / (1 - np.exp(-ka * tau))) + kin / ke / V
        np.testing.assert_allclose(c, ref, rtol=1e-11)

    def test_no_steady_state_without_elimination(self):
        """A drug that is never eliminated has no steady state: a clear error, not a number."""
        text = oral_template("oral-no-elimination", "absorbed, never eliminated").replace(
            'central = "ka*depot - ke*central"', 'central = "(ka - ke)*depot"')
        m = compile_model(parse_template(text))
        with pytest.raises(SimulationError, match="never settles"):
            simulate(m, None, [Dose(10.0, 5.0, "oral", interval=12.0, steady_state=True)], [11.0])


def ivp_history(model, theta: dict, doses: list[Dose], t: np.ndarray) -> np.ndarray:
    """Integrate the model's right-hand side dose by dose with solve_ivp (LSODA, rtol 1e-11;
    scipy as reference): the concentration at ``t`` under bolus doses listed one by one."""
    th = model.param_vector(theta)
    x = np.zeros(model.n_states)
    out = np.full(t.size, np.nan)
    cuts = sorted({d.time for d in doses}) + [float(t.max()) + 1.0]
    now = 0.0
    for c in cuts:
        if c > now:
            sol = solve_ivp(lambda _t, y: model.rhs(y, th), (now, c), x, method="LSODA", rtol=1e-11, atol=1e-13,
                            dense_output=True)
            inside = (t >= now) & (t <= c) & np.isnan(out)  # a sample at a dose time is pre-dose
            out[inside] = [model.observe(sol.sol(v), th)[0] for v in t[inside]]
            x = sol.y[:, -1].copy()
        for d in doses:
            if d.time == c:
                x[model.routes["iv"].state_index] += d.amount
        now = c
    return out


class TestNonlinear:
    @pytest.mark.parametrize("dose", [100.0, 600.0])
    def test_michaelis_menten_against_many_periods(self, dose):
        """one-comp-mm at steady state (below and near saturation) equals 120 listed doses integrated
        with solve_ivp (scipy as reference)."""
        tau, t0 = 12.0, 120 * 12.0
        p = {"Vmax": 60.0, "Km": 4.0, "V": 40.0}
        d = Dose(t0, dose, interval=tau, steady_state=True)
        s = t0 + np.array([0.0, 0.5, 3.0, 11.0])
        a = obs(MM, p, [d], s, rtol=1e-10)
        b = ivp_history(MM, p, explicit_history(d, 120), s)
        np.testing.assert_allclose(a, b, rtol=2e-7)

    def test_sensitivities_equal_finite_differences(self):
        """∂C/∂θ of one-comp-mm at steady state equals central differences."""
        d = [Dose(24.0, 300.0, interval=12.0, steady_state=True, additional=1)]
        t = np.array([24.0, 26.0, 30.0, 40.0])
        th = MM.param_vector({"Vmax": 50.0, "Km": 3.0, "V": 35.0})
        J = simulate(MM, th, d, t, sensitivities=True, rtol=1e-11).sensitivity()
        for j in range(th.size):
            h = 1e-5 * th[j]
            up, dn = th.copy(), th.copy()
            up[j] += h
            dn[j] -= h
            fd = (obs(MM, up, d, t, rtol=1e-12) - obs(MM, dn, d, t, rtol=1e-12)) / (2 * h)
            np.testing.assert_allclose(J[:, j], fd, rtol=1e-5, atol=1e-8 * np.abs(fd).max())

    def test_linear_model_same_by_both_paths(self):
        """The periodic (Newton) path of the integrator and the geometric series of the exact path
        agree on a linear model, sensitivities included."""
        d = [Dose(20.0, 90.0, "oral", interval=8.0, steady_state=True, additional=1)]
        t = np.array([20.0, 21.0, 27.0, 33.0])
        th = dict(P2, tlag=0.4)
        a = simulate(TWO_ORAL, th, d, t, sensitivities=True, method="expm")
        b = simulate(TWO_ORAL, th, d, t, sensitivities=True, method="ode", rtol=1e-11)
        np.testing.assert_allclose(b.observable(), a.observable(), rtol=1e-8)
        np.testing.assert_allclose(b.sensitivity(), a.sensitivity(), rtol=1e-6, atol=1e-9)

    def test_limit_reached_is_an_error(self, monkeypatch):
        """When the periodic state is not reached within the limit, the error says so."""
        monkeypatch.setattr(periodic, "MAX_PERIODS", 1)
        with pytest.raises(SimulationError, match="no periodic steady state of 'one-comp-mm'.*within 1 periods"):
            simulate(MM, None, [Dose(10.0, 500.0, interval=12.0, steady_state=True)], [11.0])
