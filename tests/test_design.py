"""Optimal sampling design against published designs, hand-worked optima, closed-form
variances and the general equivalence theorem."""

from __future__ import annotations

import functools
import itertools
import json
import math
from io import StringIO

import numpy as np
import pytest
from rich.console import Console

from compartments import Dose, design_samples, load_template
from compartments.design.criteria import DOptimal
from compartments.design.fisher import ResidualError, resolve_error, sample_information
from compartments.design.population_design import population_information
from compartments.design.sampling import SamplingDesign
from compartments.errors import UsageError
from compartments.template import parse_template

ORAL = load_template("one-comp-oral")
BOX_LUCAS = dict(values={"ka": 0.7, "ke": 0.2}, fixed={"V": 1.0}, doses=[Dose(time=0, amount=1.0, route="oral")],
                 window=(0, 24), error="additive")

LEVEL = parse_template('''
name = "level"
description = "a constant level: y = mu"
kind = "biology"
time_unit = "h"
[states.x]
unit = "mg/L"
initial = "mu"
amount = false
[parameters.mu]
unit = "mg/L"
default = 10
lower = 0.1
upper = 100
[equations]
x = "0"
[observables.level]
expression = "x"
unit = "mg/L"
''')


@functools.cache
def box_lucas() -> SamplingDesign:
    """The Box & Lucas two-point design, computed once for the tests that read it."""
    return design_samples(ORAL, n=2, **BOX_LUCAS)


def box_lucas_curve(t, k1, k2):
    """y = θ1/(θ1 − θ2)·(e^{−θ2 t} − e^{−θ1 t}) (Box & Lucas 1959, Biometrika 46:77)."""
    return k1 / (k1 - k2) * (np.exp(-k2 * t) - np.exp(-k1 * t))


class TestBoxLucas:
    def test_published_two_point_design(self):
        """The D-optimal two-point design for θ1 = 0.7, θ2 = 0.2 under constant variance is
        t = 1.23 and 6.86 (Box & Lucas 1959, Biometrika 46:77-90)."""
        d = box_lucas()
        np.testing.assert_allclose(d.times, [1.23, 6.86], atol=0.005)

    def test_the_model_is_the_published_one(self):
        """one-comp-oral with V = 1 and a unit oral dose is the Box & Lucas response."""
        d = box_lucas()
        t = np.asarray(d.curve["time"])
        np.testing.assert_allclose(d.curve["prediction"]["concentration"], box_lucas_curve(t, 0.7, 0.2),
                                   rtol=1e-9, atol=1e-12)

    def test_brute_force_with_closed_form_sensitivities(self):
        """A grid search of det M with the analytic derivatives of the Box & Lucas curve
        (numpy as the reference) lands on the same times."""
        t = np.linspace(0.01, 24, 2400)
        k1, k2 = 0.7, 0.2
        e1, e2 = np.exp(-k1 * t), np.exp(-k2 * t)
        g1 = -k2 / (k1 - k2) ** 2 * (e2 - e1) + k1 / (k1 - k2) * t * e1
        g2 = k1 / (k1 - k2) ** 2 * (e2 - e1) - k1 / (k1 - k2) * t * e2
        det = (g1[:, None] * g2[None, :] - g2[:, None] * g1[None, :]) ** 2
        i, j = np.unravel_index(np.argmax(np.triu(det)), det.shape)
        d = box_lucas()
        np.testing.assert_allclose(sorted([t[i], t[j]]), d.times, atol=0.011)

    def test_equivalence_theorem_holds(self):
        """At the optimum d(t) ≤ 2 everywhere, with equality at the two times (Kiefer &
        Wolfowitz 1960)."""
        d = box_lucas()
        c = d.equivalence
        assert c.holds and c.bound == 2.0
        assert max(d.sensitivity["value"]) <= 2.0 * (1 + 1e-3)
        np.testing.assert_allclose(d.sensitivity["design_value"], [2.0, 2.0], rtol=1e-4)

    def test_four_samples_replicate_the_two_support_points(self):
        """With 4 samples the exact optimum repeats each support point twice (equal weights
        again), so the equivalence theorem holds (Kiefer & Wolfowitz 1960)."""
        d = design_samples(ORAL, n=4, **BOX_LUCAS)
        np.testing.assert_allclose(d.times, [1.23, 1.23, 6.86, 6.86], atol=0.01)
        assert d.equivalence.holds

    def test_three_samples_cannot_have_equal_weights(self):
        """Three samples on a two-point support give weights 1/3 and 2/3: efficiency
        √((1/3·2/3)/(1/2·1/2)) = √(8/9) of the best design with free weights (D-optimality:
        det M ∝ w1·w2 on a fixed two-point support; worked by hand)."""
        d = design_samples(ORAL, n=3, **BOX_LUCAS)
        c = d.equivalence
        assert not c.holds
        assert c.free_weights == pytest.approx(math.sqrt(8 / 9), abs=2e-3)
        assert c.efficiency_bound <= c.free_weights + 1e-9  # Atwood's bound is a lower bound


class TestWorkedByHand:
    def test_iv_bolus_additive(self):
        """y = (D/V)·e^{−ke t} with additive error: det M ∝ e^{−2ke(t1+t2)}(t2 − t1)², so t1
        as early as possible and t2 = t1 + 1/ke (worked by hand)."""
        d = design_samples(load_template("one-comp-iv"), {"ke": 0.25, "V": 10}, n=2, window=(0, 24))
        t1, t2 = d.times
        assert t1 == pytest.approx(0.024, abs=1e-6)  # the earliest time after the dose at 0
        assert t2 - t1 == pytest.approx(4.0, abs=1e-3)
        assert d.equivalence.holds

    def test_iv_bolus_proportional(self):
        """Proportional error: J/f = (−t, −1/V) does not depend on the level, det M ∝
        (t2 − t1)², so the two window ends (worked by hand)."""
        d = design_samples(load_template("one-comp-iv"), {"ke": 0.25, "V": 10}, n=2, window=(0, 12),
                           error="proportional")
        np.testing.assert_allclose(d.times, [0.012, 12.0], atol=1e-4)

    def test_uniform_replicates_keep_the_times(self):
        """r measurements at every time multiply M by r: same D-optimal times, relative
        standard errors divided by √r."""
        one = design_samples(ORAL, n=2, **BOX_LUCAS, sd=0.05)
        three = design_samples(ORAL, n=2, **BOX_LUCAS, sd=0.05, replicates=3)
        np.testing.assert_allclose(one.times, three.times, atol=1e-4)
        for k in one.expected_rse:
            assert three.expected_rse[k] == pytest.approx(one.expected_rse[k] / math.sqrt(3), rel=1e-6)

    def test_efficiency_invariances(self):
        """A design relative to itself is 1; the same times twice carry twice the
        information, so D-efficiency 2 (M doubles, (det 2M/det M)^(1/p) = 2)."""
        d = box_lucas()
        assert d.efficiency(d.times) == pytest.approx(1.0, rel=1e-9)
        assert d.efficiency(list(d.times) * 2) == pytest.approx(2.0, rel=1e-9)
        assert d.efficiency([0.5, 2, 8]) < d.efficiency(list(d.times) + [4.0])


class TestConstraints:
    def test_allowed_times_are_the_best_combination(self):
        """With allowed times the design is the best of all combinations (checked by
        evaluating each one)."""
        allowed = [0.5, 1, 2, 4, 6, 8, 12, 24]
        d = design_samples(ORAL, n=2, **BOX_LUCAS, allowed=allowed)
        assert set(d.times) <= set(allowed)
        for combo in itertools.combinations(allowed, 2):
            assert d.efficiency(combo) <= 1 + 1e-9

    def test_spacing(self):
        """Samples keep the least spacing."""
        d = design_samples(ORAL, n=4, **BOX_LUCAS, min_spacing=1.0)
        assert np.all(np.diff(d.times) >= 1.0 - 1e-9)

    def test_spacing_that_cannot_fit(self):
        """A spacing the window cannot hold is refused."""
        with pytest.raises(UsageError, match="do not fit"):
            design_samples(ORAL, n=4, **BOX_LUCAS | {"window": (0, 2)}, min_spacing=1.0)


class TestEquivalenceEverywhere:
    @pytest.mark.parametrize("case", [
        dict(template="one-comp-iv", values={"ke": 0.2, "V": 20}, n=2),
        dict(template="one-comp-oral", values={"ka": 1.1, "ke": 0.15, "V": 30}, n=3, error="proportional"),
        dict(template="two-comp-iv", values={}, n=4),
        dict(template="one-comp-infusion", values={}, n=2, doses=[Dose(0, 100, "infusion", duration=2)]),
        dict(template="one-comp-oral", values={"ka": 0.7, "ke": 0.2}, fixed={"V": 1.0}, n=2,
             prior={"ka": 0.4, "ke": 0.3}, draws=20),
        dict(template="one-comp-oral", values={"ka": 0.7, "ke": 0.2, "V": 10}, n=3, subjects=40,
             variability={"ka": 0.3, "ke": 0.3, "V": 0.2}),
    ], ids=["iv", "oral-proportional", "two-comp", "infusion", "robust", "population"])
    def test_equivalence_theorem_holds(self, case):
        """Where an exact design can carry equal weights on its support, the returned optimum
        passes the equivalence theorem (Kiefer & Wolfowitz 1960)."""
        case = dict(case)
        d = design_samples(load_template(case.pop("template")), **case)
        assert d.equivalence.holds, d.equivalence
        assert d.equivalence.efficiency_bound == pytest.approx(1.0, abs=2e-3)


class TestPopulation:
    def test_one_way_random_effects_closed_form(self):
        """y_ij = μ + b_i + e_ij, N subjects × n samples: Var(μ̂) = (σ_b² + σ_e²/n)/N,
        Var(σ̂_b²) = 2/N·[(σ_b² + σ_e²/n)² + σ_e⁴/(n²(n−1))], Var(σ̂_e²) = 2σ_e⁴/(N(n−1))
        (balanced one-way model, maximum likelihood; Searle, Casella & McCulloch 1992,
        Variance Components, ch. 3-4). Here b = μ·η, so σ_b² = μ²ω²."""
        N, n, mu, omega, sd = 50, 4, 10.0, 0.2, 1.0
        d = design_samples(LEVEL, {"mu": mu}, n=n, window=(0, 10), subjects=N, variability={"mu": omega}, sd=sd)
        sb2, se2 = (mu * omega) ** 2, sd**2
        var_mu = (sb2 + se2 / n) / N
        var_sb2 = 2 / N * ((sb2 + se2 / n) ** 2 + se2**2 / (n**2 * (n - 1)))
        var_se2 = 2 * se2**2 / (N * (n - 1))
        assert d.expected_rse["mu"] == pytest.approx(100 * math.sqrt(var_mu) / mu, rel=1e-6)
        assert d.expected_rse_variance["mu"] == pytest.approx(100 * math.sqrt(var_sb2) / sb2, rel=1e-6)
        # the SD's relative SE is half that of the variance (delta method)
        assert d.expected_rse_error["sd_level"] == pytest.approx(50 * math.sqrt(var_se2) / se2, rel=1e-6)

    def test_no_variability_is_n_copies_of_one_subject(self):
        """With no between-subject variability the typical-value block is N times the
        information of one subject (the first-order model reduces to fixed effects)."""
        J = np.random.default_rng(0).normal(size=(1, 3, 1, 2))
        f = np.ones((1, 3, 1))
        e = ResidualError("additive", sd=(0.5,))
        M = population_information(J, f, np.array([1.0, 2.0]), [], np.zeros(0), e, np.ones(3))
        np.testing.assert_allclose(M[0, :2, :2], sample_information(J[0], f[0], e).sum(axis=0))

    def test_groups_have_their_own_times(self):
        """Two groups get a schedule each and the subjects add up."""
        d = design_samples(ORAL, {"ka": 0.7, "ke": 0.2, "V": 10}, groups=[(30, 2), (30, 2)],
                           variability={"ka": 0.3, "ke": 0.3})
        assert [g.subjects for g in d.groups] == [30, 30]
        assert all(len(g.times) == 2 for g in d.groups)
        with pytest.raises(UsageError, match="groups"):
            _ = d.times


class TestErrors:
    def test_error_model_objects_are_accepted_by_name(self):
        """An error-model object is taken by its name (the interface the estimator's error
        models share)."""
        class Proportional:
            name = "proportional"

        assert resolve_error(Proportional(), ["concentration"], [1.0]).kind == "proportional"

    @pytest.mark.parametrize("kwargs, match", [
        (dict(window=(24, 0)), "end must come after"),
        (dict(values={"CL": 1.0}), "not a parameter"),
        (dict(n=0), "n=0"),
        (dict(variability={"ka": 0.3}), "needs subjects="),
        (dict(criterion="Ds"), "interest="),
        (dict(criterion="E"), "criterion='E'"),
        (dict(allowed=[1.0, 30.0]), "outside the window"),
        (dict(error="poisson"), "error='poisson'"),
        (dict(sd=-1.0), "positive"),
    ])
    def test_bad_arguments(self, kwargs, match):
        """Bad arguments are refused with one line naming the keyword."""
        base = dict(values={"ka": 0.7, "ke": 0.2}, n=2)
        with pytest.raises(UsageError, match=match):
            design_samples(ORAL, **(base | kwargs))

    def test_structurally_non_identifiable_parameters_are_named(self):
        """Predator-prey with only prey observed cannot separate beta and predator0 at any
        times (see test_identifiability): refused, naming them."""
        with pytest.raises(UsageError, match="beta.*predator0"):
            design_samples(load_template("predator-prey"), n=6, window=(0, 20), observed=["prey"])


class TestCriteriaOnTextbookDesigns:
    """Quadratic regression y = β0 + β1 x + β2 x² on [−1, 1] (Atkinson, Donev & Tobias 2007,
    Optimum Experimental Designs, with SAS, ch. 11 and 17)."""

    x = np.linspace(-1, 1, 2001)

    def _info(self, x):
        f = np.stack([np.ones_like(x), x, x**2], axis=-1)
        return np.einsum("...i,...j->...ij", f, f)

    def test_d_optimal_quadratic(self):
        """D-optimal: −1, 0, 1 with weights 1/3; d(x) ≤ 3 with equality at the support."""
        from compartments.design.criteria import DOptimal

        M = (self._info(np.array([-1.0, 0.0, 1.0])) / 3).sum(axis=0)
        d = DOptimal().sensitivity(M, self._info(self.x))
        assert d.max() == pytest.approx(3.0, rel=1e-9)
        np.testing.assert_allclose(DOptimal().sensitivity(M, self._info(np.array([-1.0, 0.0, 1.0]))), 3.0)

    def test_ds_optimal_for_the_quadratic_term(self):
        """Ds-optimal for β2: −1, 0, 1 with weights 1/4, 1/2, 1/4; its sensitivity ≤ 1."""
        from compartments.design.criteria import DsOptimal

        M = np.einsum("g,gij->ij", np.array([0.25, 0.5, 0.25]), self._info(np.array([-1.0, 0.0, 1.0])))
        c = DsOptimal(interest=(2,), labels=("b2",))
        d = c.sensitivity(M, self._info(self.x))
        assert d.max() == pytest.approx(1.0, rel=1e-9) and c.bound(M) == 1.0
        equal = (self._info(np.array([-1.0, 0.0, 1.0])) / 3).sum(axis=0)
        assert c.sensitivity(equal, self._info(self.x)).max() > 1.0 + 1e-3  # equal weights are not Ds-optimal

    def test_ds_on_every_parameter_is_d(self):
        """Ds with every parameter of interest is D-optimality."""
        from compartments.design.criteria import DOptimal, DsOptimal

        M = (self._info(np.array([-1.0, 0.3, 1.0]))).sum(axis=0)
        assert float(DsOptimal(interest=(0, 1, 2)).value(M)) == pytest.approx(float(DOptimal().value(M)))


class TestRecord:
    def test_json_round_trip(self):
        """to_dict is plain JSON (no NaN) and from_dict restores it."""
        d = box_lucas()
        text = json.dumps(d.to_dict(), allow_nan=False)
        back = SamplingDesign.from_dict(json.loads(text))
        assert back.to_dict() == d.to_dict()
        with pytest.raises(UsageError, match="efficiency"):
            back.efficiency([1.0, 2.0])

    def test_deterministic(self):
        """The same seed gives the same design."""
        a = design_samples(ORAL, n=3, values={"ka": 1.0, "ke": 0.1, "V": 30}, seed=5)
        b = design_samples(ORAL, n=3, values={"ka": 1.0, "ke": 0.1, "V": 30}, seed=5)
        assert a.to_dict() | {"seconds": 0} == b.to_dict() | {"seconds": 0}

    def test_criteria(self):
        """A- and Ds-optimal designs run and report their own bounds."""
        a = design_samples(ORAL, n=2, **BOX_LUCAS, criterion="A")
        s = design_samples(ORAL, n=2, **BOX_LUCAS, criterion="Ds", interest=["ka"])
        assert a.criterion == "A" and s.criterion == "Ds (ka)"
        assert s.equivalence.bound == 1.0
        assert isinstance(DOptimal().value(np.eye(2)), np.ndarray)


class TestPresentation:
    def test_report_fits_80_columns(self):
        """The report keeps every number whole on an 80-column terminal."""
        from compartments.report.design import design_report

        d = design_samples(ORAL, {"ka": 0.7, "ke": 0.2, "V": 10}, n=3, subjects=60,
                           variability={"ka": 0.3, "ke": 0.3, "V": 0.2})
        out = StringIO()
        Console(file=out, width=80).print(design_report(d, [("0.5,2,8", d.efficiency([0.5, 2, 8]))]))
        text = out.getvalue()
        assert "…" not in text
        assert "Research use" in text or "research use" in text
        assert f"{d.groups[0].times[0]:.3g}" in text

    def test_figure_shows_the_sensitivity_function_and_its_bound(self):
        """The lower panel plots d(t) and the bound; the upper one the sample times."""
        from compartments.report.design_plots import design_figure

        d = box_lucas()
        fig = design_figure(d)
        top, bottom = fig.axes
        lines = {line.get_label(): line for line in bottom.get_lines()}
        np.testing.assert_allclose(lines["sensitivity function d(t)"].get_ydata(), d.sensitivity["value"])
        assert set(lines[next(k for k in lines if k.startswith("equivalence"))].get_ydata()) == {2.0}
        vertical = [ln.get_xdata()[0] for ln in top.get_lines() if ln.get_label() in ("sample times", "_child2")]
        assert vertical and vertical[0] == pytest.approx(d.times[0])
