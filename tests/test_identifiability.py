"""Structural identifiability against published results, hand-worked cases, sympy as the
exact reference and simulations of parameter sets that should give the same output."""

from __future__ import annotations

import functools
import signal
import threading

import numpy as np
import pytest
import sympy as sp
from template_texts import oral_template

from compartments import Dose, identifiability, load_template
from compartments.design.identifiability import IdentifiabilityResult, _time_limit
from compartments.design.jets import NotRational, Occasion, build_jets
from compartments.errors import UsageError
from compartments.library import list_templates
from compartments.model import compile_model
from compartments.simulate import simulate
from compartments.template import parse_template

# A generous bound: the answers, not the speed, are under test here (the speed is measured
# in benchmarks/identifiability.py).
SLOW_OK = 300.0

T = np.linspace(0.05, 30.0, 60)


@functools.cache
def flip_flop() -> IdentifiabilityResult:
    """one-comp-oral with its defaults, computed once for the tests that read it."""
    return identifiability(load_template("one-comp-oral"), timeout=SLOW_OK)


@functools.cache
def prey_only() -> IdentifiabilityResult:
    """predator-prey with only the prey observed, computed once."""
    return identifiability(load_template("predator-prey"), observed=["prey"], timeout=SLOW_OK)


def _two_compartment(dose_state: str) -> str:
    return f'''
name = "two-comp-{dose_state}"
description = "two compartments, bolus into the {dose_state} one, sampled in the central one"
kind = "pk"
time_unit = "h"
[states.central]
unit = "mg"
[states.peripheral]
unit = "mg"
[parameters.k10]
unit = "1/h"
default = 0.2
lower = 0.001
upper = 20
[parameters.k12]
unit = "1/h"
default = 0.5
lower = 0.001
upper = 20
[parameters.k21]
unit = "1/h"
default = 0.3
lower = 0.001
upper = 20
[parameters.V1]
unit = "L"
default = 10
lower = 0.1
upper = 1000
[equations]
central = "-(k10 + k12)*central + k21*peripheral"
peripheral = "k12*central - k21*peripheral"
[doses.iv]
state = "{dose_state}"
[observables.concentration]
expression = "central / V1"
unit = "mg/L"
'''


ORAL_F = oral_template("oral-with-F", "one compartment, oral (fraction F absorbed) and IV inputs").replace(
    '[doses.oral]\nstate = "depot"\n',
    '[doses.oral]\nstate = "depot"\nbioavailability = "F"\n\n[doses.iv]\nstate = "central"\n',
) + """
[parameters.F]
unit = "1"
default = 0.5
lower = 0.01
upper = 1
log = false
"""


class TestPublished:
    def test_two_compartment_central_dose_is_global(self):
        """Two compartments dosed and sampled in the central one: every rate constant and
        the volume globally identifiable (Godfrey 1983, Compartmental Models and Their
        Application, ch. 6)."""
        r = identifiability(load_template("two-comp-iv"), routes=["iv"], timeout=SLOW_OK)
        assert r.status == {"k10": "global", "k12": "global", "k21": "global", "V1": "global"}
        assert r.solutions == 1

    def test_one_compartment_oral_flip_flop(self):
        """One compartment with first-order absorption: ka, ke and V only locally
        identifiable, two parameter sets per output (the flip-flop pair; Godfrey 1983,
        ch. 6; the Bateman function is symmetric in ka and ke)."""
        r = flip_flop()
        assert r.status == {"ka": "local", "ke": "local", "V": "local"}
        assert r.solutions == 2 and r.admissible == 2
        (other,) = r.alternatives
        ka, ke, V = (r.point[k] for k in ("ka", "ke", "V"))
        # worked by hand from the Bateman form D·ka/(V(ka − ke))·(e^{−ke t} − e^{−ka t}):
        # swapping ka and ke leaves it unchanged when V becomes V·ke/ka
        assert other["ka"] == pytest.approx(ke, rel=1e-12)
        assert other["ke"] == pytest.approx(ka, rel=1e-12)
        assert other["V"] == pytest.approx(V * ke / ka, rel=1e-12)

    def test_flip_flop_pair_simulates_to_the_same_curve(self):
        """The two parameter sets found give the same concentrations (simulated)."""
        r = flip_flop()
        m = compile_model(load_template("one-comp-oral"))
        dose = [Dose(0.0, 100.0, "oral")]
        a = simulate(m, dict(r.point), dose, T).observable()
        b = simulate(m, dict(r.alternatives[0]), dose, T).observable()
        np.testing.assert_allclose(a, b, rtol=1e-10)


class TestWorkedByHand:
    def test_known_volume_breaks_the_flip_flop(self):
        """With V known the first coefficient D·ka/V fixes ka, then the second fixes ke:
        both global (worked by hand from the Taylor series of the Bateman function)."""
        r = identifiability(load_template("one-comp-oral"), known=["V", "tlag"], timeout=SLOW_OK)
        assert r.status == {"ka": "global", "ke": "global"}

    def test_lag_time_fixed_by_the_onset(self):
        """An estimated lag time is fixed by when the response starts (the system is at rest
        before the dose); the rest keeps its answer (worked by hand)."""
        r = identifiability(load_template("one-comp-oral"), known=[], timeout=SLOW_OK)
        assert r.status["tlag"] == "global"
        assert r.status["ka"] == "local"

    def test_dose_into_the_peripheral_compartment(self):
        """Dosed into the peripheral compartment and sampled in the central one, the output
        is D·k21/(V1·(s² + (k10+k12+k21)s + k10·k21)) in Laplace terms (worked by hand):
        three functions for four parameters, so none is identifiable; where the dose enters
        changes the answer (cf. Godfrey 1983, ch. 6)."""
        t = parse_template(_two_compartment("peripheral"))
        r = identifiability(t, timeout=SLOW_OK)
        assert set(r.status.values()) == {"none"}
        k10, k12, k21, V1 = sp.symbols("k10 k12 k21 V1", real=True)
        combos = set(r.combinations)
        assert len(combos) == 3
        # the hand-worked generators k21/V1, k10 + k12 + k21 and k10·k21 must lie in the
        # span of what was found: check on a family that keeps the hand-worked ones fixed
        point = {k10: 0.2, k12: 0.5, k21: 0.3, V1: 10.0}
        lam = 1.7
        moved = {k10: 0.2 / lam, k21: 0.3 * lam, V1: 10.0 * lam}
        moved[k12] = 0.2 + 0.5 + 0.3 - moved[k10] - moved[k21]
        for c in combos:
            assert float(c.subs(point)) == pytest.approx(float(c.subs(moved)), rel=1e-12)
        # and the two parameter sets simulate to the same curve
        m = compile_model(t)
        dose = [Dose(0.0, 100.0, "iv")]
        a = simulate(m, {k.name: v for k, v in point.items()}, dose, T).observable()
        b = simulate(m, {k.name: v for k, v in moved.items()}, dose, T).observable()
        np.testing.assert_allclose(a, b, rtol=1e-10)

    def test_same_model_dosed_centrally_is_global(self):
        """The same file dosed into the central compartment: global (Godfrey 1983)."""
        r = identifiability(parse_template(_two_compartment("central")), timeout=SLOW_OK)
        assert set(r.status.values()) == {"global"}

    def test_bioavailability_and_volume_only_as_a_ratio(self):
        """Oral doses alone fix F and V only as F/V (the output is F·D·ka/(V(ka−ke))·(…),
        worked by hand); an IV occasion as well fixes both (absolute bioavailability,
        common practice)."""
        t = parse_template(ORAL_F)
        r = identifiability(t, routes=["oral"], timeout=SLOW_OK)
        assert r.status["F"] == r.status["V"] == "none"
        assert [str(c) for c in r.combinations] in (["F/V"], ["V/F"])
        both = identifiability(t, routes=["oral", "iv"], timeout=SLOW_OK)
        assert set(both.status.values()) == {"global"}

    def test_predator_prey_with_only_prey_observed(self):
        """Prey x observed, predator y not: z = β·y obeys z' = δ·x·z − γ·z and x' = α·x − x·z,
        so x(t) fixes α, γ, δ and x(0) but β and y(0) only as β·y(0) (worked by hand: the
        scaling y → λy, β → β/λ leaves x unchanged, the similarity-transformation argument
        of Vajda, Godfrey & Rabitz 1989, Math Biosci 93:217)."""
        r = prey_only()
        assert r.status == {"alpha": "global", "beta": "none", "delta": "global", "gamma": "global",
                            "prey0": "global", "predator0": "none"}
        assert [str(c) for c in r.combinations] == ["beta*predator0"]

    def test_predator_prey_scaling_simulates_to_the_same_prey(self):
        """β/2 with twice the predators gives the same prey counts and twice the predators."""
        m = compile_model(load_template("predator-prey"))
        base = {"alpha": 1.0, "beta": 0.1, "delta": 0.075, "gamma": 1.5, "prey0": 10.0, "predator0": 5.0}
        scaled = base | {"beta": 0.05, "predator0": 10.0}
        t = np.linspace(0.0, 15.0, 40)
        a = simulate(m, base, [], t)
        b = simulate(m, scaled, [], t)
        np.testing.assert_allclose(a.observable("prey"), b.observable("prey"), rtol=1e-6)
        np.testing.assert_allclose(b.observable("predator"), 2 * a.observable("predator"), rtol=1e-6)

    def test_predator_prey_both_observed(self):
        """Both populations observed: every parameter global (worked by hand: x'/x and y'/y
        are linear in y and x with coefficients α, −β and δ, −γ)."""
        r = identifiability(load_template("predator-prey"), timeout=SLOW_OK)
        assert set(r.status.values()) == {"global"}

    def test_michaelis_menten_elimination(self):
        """C(0) = D/V fixes V; C' = −(Vmax/V)·C/(Km + C) is a hyperbola in C that fixes
        Vmax/V and Km: all global (worked by hand)."""
        r = identifiability(load_template("one-comp-mm"), timeout=SLOW_OK)
        assert set(r.status.values()) == {"global"}

    def test_substrate_depletion(self):
        """S(0) = S0 and S' = −Vmax·S/(Km + S), a hyperbola in S: all global (by hand)."""
        r = identifiability(load_template("enzyme-substrate"), timeout=SLOW_OK)
        assert set(r.status.values()) == {"global"}


class TestJetsAgainstSympy:
    def test_output_coefficients_equal_the_series_of_the_bateman_function(self):
        """The jets equal the Taylor coefficients of the closed form, exactly (sympy series
        as the reference)."""
        t = load_template("one-comp-oral")
        D = sp.Rational(7, 3)
        jets = build_jets(t, ["concentration"], [Occasion("oral", D)], ["ka", "ke", "V"], {}, 6)
        ka, ke, V = sp.Rational(3, 7), sp.Rational(11, 5), sp.Rational(13, 2)
        values = jets.evaluate({"ka": sp.QQ(3, 7), "ke": sp.QQ(11, 5), "V": sp.QQ(13, 2)})
        got = [sp.Rational(int(v.numerator), int(v.denominator)) for v in jets.output_values(values)]
        s = sp.Symbol("s")
        bateman = D * ka / (V * (ka - ke)) * (sp.exp(-ke * s) - sp.exp(-ka * s))
        series = sp.series(bateman, s, 0, 7).removeO()
        expected = [series.coeff(s, k) * sp.factorial(k) for k in range(7)]
        assert got == expected

    def test_jacobian_equals_sympy_derivatives(self):
        """The implicit-differentiation Jacobian equals sympy's derivatives of the symbolic
        Taylor coefficients, exactly."""
        t = load_template("one-comp-oral")
        D = sp.Rational(5, 2)
        jets = build_jets(t, ["concentration"], [Occasion("oral", D)], ["ka", "ke", "V"], {}, 4)
        point = {"ka": sp.QQ(3, 7), "ke": sp.QQ(11, 5), "V": sp.QQ(13, 2)}
        J = jets.jacobian(point)
        ka, ke, V, s = sp.symbols("ka ke V s")
        bateman = D * ka / (V * (ka - ke)) * (sp.exp(-ke * s) - sp.exp(-ka * s))
        coeffs = [sp.diff(bateman, s, k).subs(s, 0) for k in range(5)]
        values = {ka: sp.Rational(3, 7), ke: sp.Rational(11, 5), V: sp.Rational(13, 2)}
        expected = sp.Matrix([[sp.simplify(sp.diff(c, q)).subs(values) for q in (ka, ke, V)] for c in coeffs])
        assert J == expected

    def test_rational_functions_only(self):
        """An exponential of a state is refused with a reason."""
        text = _two_compartment("central").replace('"-(k10 + k12)*central + k21*peripheral"',
                                                   '"-(k10 + k12)*central + k21*exp(peripheral)"')
        with pytest.raises(NotRational, match="rational functions"):
            build_jets(parse_template(text), ["concentration"], [Occasion("iv")], ["k10"], {}, 2)


class TestEveryShippedTemplate:
    @pytest.mark.parametrize("name", [t.name for t in list_templates()])
    def test_every_shipped_template_is_decided(self, name):
        """Every shipped template gets a decided answer for every parameter."""
        r = identifiability(load_template(name), timeout=SLOW_OK)
        assert "undecided" not in r.status.values(), r.why

    def test_expected_answers(self):
        """Answers that follow from the hand-worked cases above: the oral two-compartment
        model has three exponentials that can be assigned to absorption in three ways
        (Godfrey 1983, ch. 6), so three solutions; k21 is fixed by the numerator zero."""
        r = identifiability(load_template("two-comp-oral"), timeout=SLOW_OK)
        assert r.status["k21"] == "global"
        assert {r.status[k] for k in ("ka", "k10", "k12", "V1")} == {"local"}
        assert r.solutions == 3


class TestUndecided:
    def test_not_rational(self):
        """A model with exp() of a state is undecided, with the reason."""
        text = _two_compartment("central").replace('"k12*central - k21*peripheral"',
                                                   '"k12*central - k21*exp(peripheral)"')
        r = identifiability(parse_template(text), timeout=SLOW_OK)
        assert set(r.status.values()) == {"undecided"}
        assert "rational functions" in r.why["k10"]

    def test_time_bound(self):
        """A time bound too short for the work leaves the answer undecided and says why."""
        r = identifiability(load_template("two-comp-oral"), timeout=0.01)
        assert "undecided" in r.status.values()
        assert any("time bound" in w for w in r.why.values())


class TestTimeLimit:
    @pytest.mark.skipif(not hasattr(signal, "setitimer"), reason="POSIX interval timers")
    def test_outer_timer_is_restored(self):
        """A longer outer interval timer keeps running after the bound is lifted."""
        if threading.current_thread() is not threading.main_thread():
            pytest.skip("main thread only")
        fired = []
        previous = signal.signal(signal.SIGALRM, lambda *_: fired.append(1))
        try:
            signal.setitimer(signal.ITIMER_REAL, 50.0)
            with _time_limit(5.0) as armed:
                assert armed
            left, _ = signal.getitimer(signal.ITIMER_REAL)
            assert 40.0 < left <= 50.0
        finally:
            signal.setitimer(signal.ITIMER_REAL, 0)
            signal.signal(signal.SIGALRM, previous)
        assert not fired


class TestInputs:
    def test_unknown_observable(self):
        """An observable the template lacks is named, with the ones it has."""
        with pytest.raises(UsageError, match="observed='plasma'.*concentration"):
            identifiability(load_template("one-comp-oral"), observed=["plasma"])

    def test_route_not_accepted(self):
        """A route the template has no input for is refused."""
        with pytest.raises(UsageError, match="routes='iv'.*oral"):
            identifiability(load_template("one-comp-oral"), routes=["iv"])

    def test_unknown_known_parameter(self):
        """known= must name parameters of the template."""
        with pytest.raises(UsageError, match="known='CL'"):
            identifiability(load_template("one-comp-oral"), known=["CL"])

    def test_deterministic(self):
        """The same seed gives the same answer and the same point."""
        a = identifiability(load_template("one-comp-oral"), seed=3, timeout=SLOW_OK)
        b = identifiability(load_template("one-comp-oral"), seed=3, timeout=SLOW_OK)
        assert a.point == b.point and a.alternatives == b.alternatives

    def test_round_trip(self):
        """to_dict and from_dict keep the answer, combinations included."""
        r = prey_only()
        back = IdentifiabilityResult.from_dict(r.to_dict())
        assert back.to_dict() == r.to_dict()
