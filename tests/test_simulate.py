"""The exact simulator against closed forms, sympy and scipy's integrator."""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp
from scipy.integrate import solve_ivp

from compartments import Dose, regimen
from compartments.library import list_templates, load_template
from compartments.model import compiled
from compartments.simulate import simulate

T = np.array([0.1, 0.3, 0.7, 1.0, 1.5, 2.2, 3.0, 4.5, 6.0, 8.0, 12.0, 18.0, 24.0])


def bateman(t, dose, ka, ke, V, F=1.0, tlag=0.0):
    """C(t) = F·D·ka/(V(ka−ke))·(e^{−ke t} − e^{−ka t}) (Bateman 1910; Gibaldi & Perrier,
    Pharmacokinetics, 2nd ed., 1982, ch. 1)."""
    tt = np.clip(t - tlag, 0, None)
    return F * dose * ka / (V * (ka - ke)) * (np.exp(-ke * tt) - np.exp(-ka * tt))


class TestOneCompartmentOral:
    def test_bateman(self):
        """one-comp-oral equals the Bateman function."""
        m = compiled(load_template("one-comp-oral"))
        r = simulate(m, {"ka": 1.3, "ke": 0.17, "V": 25.0}, [Dose(0, 320, "oral")], T)
        np.testing.assert_allclose(r.observable(), bateman(T, 320, 1.3, 0.17, 25.0), rtol=1e-12)

    def test_bateman_with_lag(self):
        """A lag time shifts the Bateman curve (Gibaldi & Perrier 1982)."""
        m = compiled(load_template("one-comp-oral"))
        r = simulate(m, {"ka": 0.9, "ke": 0.2, "V": 10.0, "tlag": 0.6}, [Dose(0, 100, "oral")], T)
        np.testing.assert_allclose(r.observable(), bateman(T, 100, 0.9, 0.2, 10.0, tlag=0.6), rtol=1e-11, atol=1e-14)

    @pytest.mark.parametrize("rel", [1e-3, 1e-6])
    def test_ka_close_to_ke(self, rel):
        """Near ka = ke the Bateman form loses digits; compare with its limit expanded to
        first order: C ≈ D·k·t·e^{−kt}/V · (1 + ...) — here against the exact form in
        extended precision via sympy (sympy as reference)."""
        ke = 0.25
        ka = ke * (1 + rel)
        m = compiled(load_template("one-comp-oral"))
        r = simulate(m, {"ka": ka, "ke": ke, "V": 12.0}, [Dose(0, 50, "oral")], T)
        t_s, ka_s, ke_s = sp.symbols("t ka ke", positive=True)
        expr = 50 * ka_s / (12 * (ka_s - ke_s)) * (sp.exp(-ke_s * t_s) - sp.exp(-ka_s * t_s))
        ref = [float(expr.subs({ka_s: sp.Rational(str(ka)), ke_s: sp.Rational(str(ke)), t_s: sp.Rational(str(x))}).evalf(40)) for x in T]
        np.testing.assert_allclose(r.observable(), ref, rtol=1e-9)

    def test_ka_equal_ke_limit(self):
        """ka = ke exactly: C = D·k·t·e^{−kt}/V (limit of the Bateman function; Gibaldi &
        Perrier 1982)."""
        k = 0.3
        m = compiled(load_template("one-comp-oral"))
        r = simulate(m, {"ka": k, "ke": k, "V": 8.0}, [Dose(0, 40, "oral")], T)
        np.testing.assert_allclose(r.observable(), 40 * k * T * np.exp(-k * T) / 8.0, rtol=1e-10)


def biexponential(t, dose, k10, k12, k21, V1):
    """IV bolus two-compartment closed form C = D/V1·[(α−k21)e^{−αt} + (k21−β)e^{−βt}]/(α−β),
    α, β the roots of s² − (k10+k12+k21)s + k10·k21 (Gibaldi & Perrier 1982, ch. 2)."""
    s = k10 + k12 + k21
    d = np.sqrt(s * s - 4 * k10 * k21)
    a, b = (s + d) / 2, (s - d) / 2
    return dose / V1 * ((a - k21) * np.exp(-a * t) + (k21 - b) * np.exp(-b * t)) / (a - b)


class TestTwoCompartment:
    def test_biexponential(self):
        m = compiled(load_template("two-comp-iv"))
        p = {"k10": 0.4, "k12": 0.9, "k21": 0.35, "V1": 6.0}
        r = simulate(m, p, [Dose(0, 100, "iv")], T)
        np.testing.assert_allclose(r.observable(), biexponential(T, 100, **p), rtol=1e-11)

    def test_derived_alpha_beta(self):
        """The template's derived alpha, beta equal the closed-form roots (Gibaldi & Perrier 1982)."""
        t = load_template("two-comp-iv")
        vals = {sp.Symbol(n, real=True): v for n, v in {"k10": 0.4, "k12": 0.9, "k21": 0.35, "V1": 6.0}.items()}
        d = {x.name: float(x.expression.xreplace({s: vals[sp.Symbol(s.name, real=True)] for s in x.expression.free_symbols})) for x in t.derived}
        s = 0.4 + 0.9 + 0.35
        disc = np.sqrt(s * s - 4 * 0.4 * 0.35)
        assert d["alpha"] == pytest.approx((s + disc) / 2, rel=1e-12)
        assert d["beta"] == pytest.approx((s - disc) / 2, rel=1e-12)
        assert d["Vss"] == pytest.approx(6.0 * (1 + 0.9 / 0.35), rel=1e-12)  # Vss = V1(1 + k12/k21), textbook

    def test_k12_zero_is_one_compartment(self):
        """A two-compartment model with k12 = 0 equals the one-compartment one (limit case)."""
        two = compiled(load_template("two-comp-iv"))
        one = compiled(load_template("one-comp-iv"))
        a = simulate(two, {"k10": 0.2, "k12": 0.0, "k21": 0.5, "V1": 9.0}, [Dose(0, 70)], T).observable()
        b = simulate(one, {"ke": 0.2, "V": 9.0}, [Dose(0, 70)], T).observable()
        np.testing.assert_allclose(a, b, rtol=1e-12)


class TestDosing:
    def test_superposition(self):
        """Linear models: multiple doses equal the sum of shifted single doses (superposition)."""
        m = compiled(load_template("two-comp-oral"))
        p = {"ka": 0.8, "k10": 0.15, "k12": 0.3, "k21": 0.2, "V1": 20.0}
        doses = [Dose(0, 100, "oral"), Dose(7.5, 50, "oral"), Dose(13.2, 80, "oral")]
        both = simulate(m, p, doses, T).observable()
        parts = sum(simulate(m, p, [Dose(0, d.amount, "oral")], np.clip(T - d.time, 0, None)).observable() * (T > d.time) for d in doses)
        np.testing.assert_allclose(both, parts, rtol=1e-10, atol=1e-14)

    def test_accumulation_ratio(self):
        """Steady-state trough over first trough → 1/(1 − e^{−ke·τ}) (textbook accumulation ratio;
        Gibaldi & Perrier 1982, ch. 3)."""
        ke, tau = 0.1, 12.0
        m = compiled(load_template("one-comp-iv"))
        doses = regimen(100, every=tau, count=60)
        t = np.array([tau, 60 * tau])  # pre-dose sample at τ sees only the first dose
        c = simulate(m, {"ke": ke, "V": 10}, doses, t).observable()
        assert c[1] / c[0] == pytest.approx(1 / (1 - np.exp(-ke * tau)), rel=1e-9)

    def test_infusion_closed_form(self):
        """Zero-order infusion: C = R/(V·ke)(1 − e^{−ke t}) during, then exponential decay
        (Gibaldi & Perrier 1982, ch. 2)."""
        ke, V, R, dur = 0.3, 5.0, 40.0, 2.0
        m = compiled(load_template("one-comp-infusion"))
        r = simulate(m, {"ke": ke, "V": V}, [Dose(0, R * dur, "infusion", duration=dur)], T).observable()
        during = R / (V * ke) * (1 - np.exp(-ke * np.minimum(T, dur)))
        ref = np.where(T <= dur, during, R / (V * ke) * (1 - np.exp(-ke * dur)) * np.exp(-ke * (T - dur)))
        np.testing.assert_allclose(r, ref, rtol=1e-11)

    def test_sample_at_dose_time_is_pre_dose(self):
        """A sample at the dose time sees the state before the dose (common practice)."""
        m = compiled(load_template("one-comp-iv"))
        c = simulate(m, {"ke": 0.2, "V": 10}, [Dose(0, 100), Dose(12, 100)], [0.0, 12.0]).observable()
        assert c[0] == 0.0
        assert c[1] == pytest.approx(10 * np.exp(-0.2 * 12), rel=1e-12)

    def test_sympy_dsolve_reference(self):
        """one-comp-oral against sympy's dsolve of the same ODEs (sympy as reference)."""
        t = sp.Symbol("t", positive=True)
        a, c = sp.Function("a"), sp.Function("c")
        ka, ke = sp.Rational(7, 5), sp.Rational(1, 5)
        sol = sp.dsolve([sp.Eq(a(t).diff(t), -ka * a(t)), sp.Eq(c(t).diff(t), ka * a(t) - ke * c(t))],
                        [a(t), c(t)], ics={a(0): 100, c(0): 0})
        central = [s.rhs for s in sol if s.lhs == c(t)][0]
        ref = np.array([float(central.subs(t, sp.Float(x, 30)).evalf(30)) / 16 for x in T])
        m = compiled(load_template("one-comp-oral"))
        r = simulate(m, {"ka": 1.4, "ke": 0.2, "V": 16}, [Dose(0, 100, "oral")], T).observable()
        np.testing.assert_allclose(r, ref, rtol=1e-12)


def _ref_solve(template, theta, doses, times):
    """Integrate the template's own equations with solve_ivp at rtol 1e-10 (scipy as reference),
    dose by dose, independent of the compiled model."""
    names = list(template.state_names) + list(template.parameter_names)
    syms = [sp.Symbol(n, real=True) for n in names]
    by = {s.name: s for s in syms}
    rhs = [template.equations[s].xreplace({x: by[x.name] for x in template.equations[s].free_symbols}) for s in template.state_names]
    f = sp.lambdify(syms, rhs, "numpy")
    x0 = [float(s.initial.xreplace({x: theta[x.name] for x in s.initial.free_symbols})) for s in template.states]
    th = [theta[n] for n in template.parameter_names]
    x = np.array(x0, dtype=float)
    out = np.zeros((len(times), len(x)))
    cuts = sorted({d.time for d in doses} | {0.0})
    t_now = 0.0
    for i, c in enumerate(cuts + [max(times) + 1]):
        seg = [j for j, tt in enumerate(times) if t_now <= tt <= c and not (i > 0 and tt == t_now)]
        if c > t_now:
            s = solve_ivp(lambda _t, y: np.array(f(*y, *th), dtype=float), (t_now, c), x, method="LSODA",
                          rtol=1e-10, atol=1e-12, dense_output=True)
            for j in seg:
                out[j] = s.sol(times[j])
            x = s.y[:, -1].copy()
        for d in doses:
            if d.time == c:
                entry = template.doses[d.route]
                x[template.state_names.index(entry.state)] += d.amount
        t_now = c
    return out


@pytest.mark.parametrize("template", [t.name for t in list_templates()])
def test_every_template_matches_solve_ivp(template):
    """Every shipped template's simulation against scipy's solve_ivp (rtol 1e-10) on the raw
    right-hand side, and its sensitivities against central finite differences."""
    t = load_template(template)
    m = compiled(t)
    theta = {p.name: p.default for p in t.parameters}
    route = "oral" if "oral" in t.doses else ("iv" if "iv" in t.doses else None)
    doses = [Dose(0.0, 100.0, route), Dose(5.0, 60.0, route)] if route else []
    times = np.array([0.2, 0.9, 2.0, 4.0, 5.0, 6.5, 9.0, 14.0])
    r = simulate(m, theta, doses, times, sensitivities=True, rtol=1e-11)
    ref = _ref_solve(t, theta, doses, times)
    np.testing.assert_allclose(r.states, ref, rtol=1e-7, atol=1e-9 * max(1.0, np.abs(ref).max()))
    # sensitivities: central differences (step 1e-6 relative)
    v = m.param_vector(theta)
    for j, name in enumerate(m.parameter_names):
        if name == "tlag":
            continue  # a lag kinks the curve at the dose time; checked separately
        h = 1e-6 * max(1.0, abs(v[j]))
        up, dn = v.copy(), v.copy()
        up[j] += h
        dn[j] -= h
        fd = (simulate(m, up, doses, times, rtol=1e-12).observables - simulate(m, dn, doses, times, rtol=1e-12).observables) / (2 * h)
        scale = max(1e-8, float(np.abs(fd).max()))
        np.testing.assert_allclose(r.observable_sensitivities[:, :, j], fd, atol=2e-5 * scale, err_msg=name)


def test_lag_sensitivity_away_from_kink():
    """∂C/∂tlag equals central differences away from the lagged dose time."""
    m = compiled(load_template("one-comp-oral"))
    th = m.param_vector({"ka": 1.1, "ke": 0.2, "V": 9.0, "tlag": 0.4})
    j = m.parameter_names.index("tlag")
    d = [Dose(0, 100, "oral")]
    r = simulate(m, th, d, T, sensitivities=True)
    up, dn = th.copy(), th.copy()
    up[j] += 1e-6
    dn[j] -= 1e-6
    fd = (simulate(m, up, d, T).observable() - simulate(m, dn, d, T).observable()) / 2e-6
    np.testing.assert_allclose(r.sensitivity()[:, j], fd, rtol=1e-5, atol=1e-8)


def test_lotka_volterra_first_integral():
    """δx − γ ln x + βy − α ln y is constant along Lotka–Volterra orbits (Lotka 1925; Volterra 1926)."""
    t = load_template("predator-prey")
    m = compiled(t)
    p = {p.name: p.default for p in t.parameters}
    times = np.linspace(0, 60, 121)
    r = simulate(m, p, [], times, rtol=1e-11)
    x, y = r.state("prey"), r.state("predator")
    H = p["delta"] * x - p["gamma"] * np.log(x) + p["beta"] * y - p["alpha"] * np.log(y)
    assert np.ptp(H) < 1e-7 * abs(H[0])
    assert np.ptp(x) > 0.1 * x.mean()  # the orbit actually moves


@pytest.mark.parametrize("template", ["predator-prey", "one-comp-mm", "sir"])
def test_odeint_and_solve_ivp_drivers_agree(template):
    """The default LSODA driver (scipy odeint) against the same method driven by scipy's
    solve_ivp, states and sensitivities (scipy as reference; both at rtol 1e-10)."""
    t = load_template(template)
    m = compiled(t)
    doses = [Dose(0.0, 100.0, "iv"), Dose(6.0, 50.0, "iv")] if "iv" in t.doses else []
    times = np.array([0.0, 0.4, 1.5, 3.0, 6.0, 6.0, 9.5, 15.0])
    a = simulate(m, None, doses, times, sensitivities=True, method="ode", rtol=1e-10)
    b = simulate(m, None, doses, times, sensitivities=True, method="ivp", rtol=1e-10)
    np.testing.assert_allclose(a.states, b.states, rtol=1e-7, atol=1e-9 * np.abs(b.states).max())
    scale = np.abs(b.state_sensitivities).max()
    np.testing.assert_allclose(a.state_sensitivities, b.state_sensitivities, rtol=1e-6, atol=1e-8 * scale)
