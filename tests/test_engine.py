"""The eigen-decomposition engine against the matrix-exponential path and scipy, and the batch."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from compartments import Dose, load_template
from compartments.engine import linear, prepare, solve_states
from compartments.library import list_templates
from compartments.model import compile_model, compiled
from compartments.simulate import simulate
from compartments.template import parse_template

LINEAR = [t.name for t in list_templates() if compiled(t).is_linear]
TIMES = np.array([0.0, 0.3, 1.0, 2.5, 6.0, 12.0, 12.0, 13.0, 20.0, 30.0, 47.5, 60.0, 75.0])


def histories(model) -> dict[str, list[Dose]]:
    """Dose histories exercising every kind of term the model's routes allow."""
    out: dict[str, list[Dose]] = {}
    bolus = "oral" if "oral" in model.routes else ("iv" if "iv" in model.routes else None)
    if bolus:
        out["repeated"] = [Dose(0.0, 100.0, bolus), Dose(12.0, 60.0, bolus, interval=8.0, additional=3)]
        out["steady"] = [Dose(0.0, 50.0, bolus), Dose(30.0, 80.0, bolus, interval=12.0, steady_state=True,
                                                      additional=2)]
    if "infusion" in model.routes:
        out["infusions"] = [Dose(1.0, 120.0, "infusion", duration=3.0), Dose(12.0, 40.0, "infusion", rate=20.0),
                            Dose(13.0, 10.0, "iv"), Dose(40.0, 90.0, "infusion", duration=4.0, interval=12.0,
                                                                 steady_state=True, additional=1)]
    return out


def params(model, lag: float = 0.0) -> np.ndarray:
    th = model.param_vector(None)
    if "tlag" in model.parameter_names:
        th[model.parameter_names.index("tlag")] = lag
    return th


CASES = [(name, key, lag) for name in LINEAR for key in histories(compiled(load_template(name)))
         for lag in ((0.0, 0.8) if "tlag" in compiled(load_template(name)).parameter_names else (0.0,))]


class TestAgainstReferences:
    @pytest.mark.parametrize(("name", "key", "lag"), CASES)
    def test_equals_matrix_exponential(self, name, key, lag):
        """States and sensitivities equal the augmented matrix-exponential path (the path used
        before this engine) to 1e-10 relative, on every linear template and dose history."""
        m = compiled(load_template(name))
        th, doses = params(m, lag), histories(m)[key]
        X, S = solve_states(m, th, doses, TIMES, True)
        Xr, Sr = solve_states(m, th, doses, TIMES, True, method="expm")
        np.testing.assert_allclose(X, Xr, rtol=1e-10, atol=1e-12 * np.abs(Xr).max())
        np.testing.assert_allclose(S, Sr, rtol=1e-9, atol=1e-10 * np.abs(Sr).max())

    @pytest.mark.parametrize(("name", "key", "lag"), [c for c in CASES if not any(
        d.steady_state for d in histories(compiled(load_template(c[0])))[c[1]])])
    def test_equals_solve_ivp(self, name, key, lag):
        """Observables equal scipy's solve_ivp (DOP853, rtol 1e-13) on the template's own right-hand
        side, dose by dose, to 1e-9 relative (scipy as reference)."""
        m = compiled(load_template(name))
        th, doses = params(m, lag), histories(m)[key]
        y = simulate(m, th, doses, TIMES).observable()
        np.testing.assert_allclose(y, _ivp(m, th, doses, TIMES), rtol=1e-9, atol=1e-11 * np.abs(y).max())


def _ivp(model, th, doses, times):
    """Piecewise solve_ivp with the infusion inputs and lagged boluses of ``doses``."""
    events = []
    for d in (x for rec in doses for x in rec.expanded()):
        e = model.routes["iv" if d.route == "infusion" and "infusion" not in model.routes else d.route]
        t0 = d.time + (th[e.lag_index] if e.lag_index is not None else 0.0)
        if d.route == "infusion":
            events += [(t0, e.state_index, 0.0, d.infusion_rate), (t0 + d.infusion_duration, e.state_index, 0.0,
                                                                   -d.infusion_rate)]
        else:
            events.append((t0, e.state_index, d.amount, 0.0))
    cuts = sorted({0.0, *(ev[0] for ev in events)}) + [float(times.max()) + 1.0]
    x, u = model.initial(th), np.zeros(model.n_states)
    out = np.full(times.size, np.nan)
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        at = (times == a) & np.isnan(out)  # a sample at a dose time is taken before it
        out[at] = model.observe(x, th)[0]
        for ev in (ev for ev in events if ev[0] == a):
            x[ev[1]] += ev[2]
            u[ev[1]] += ev[3]
        inside = (times >= a) & (times <= b) & np.isnan(out)
        sol = solve_ivp(lambda _t, y, u=u: model.rhs(y, th) + u, (a, b), x, method="DOP853", rtol=1e-13,
                        atol=1e-15, dense_output=True)
        out[inside] = [model.observe(sol.sol(v), th)[0] for v in times[inside]]
        x = sol.y[:, -1].copy()
    return out


class TestFallback:
    @pytest.mark.parametrize("rel", [0.0, 1e-7, 1e-4, 2e-3, 1e-2])
    def test_close_eigenvalues(self, rel):
        """ka within GAP of ke goes to the matrix exponential, beyond it to the eigen path; both equal
        the exact limit ka = ke where it applies and the expm path everywhere (1e-9)."""
        m = compiled(load_template("one-comp-oral"))
        th = m.param_vector({"ka": 0.3 * (1 + rel), "ke": 0.3, "V": 8.0})
        d = prepare(m, [([Dose(0, 40, "oral")], TIMES)])
        _, _, bad = linear.solve(m, d.kernel, d.layout, th[None], False)
        assert bool(bad[0]) == (rel < linear.GAP)
        X, S = solve_states(m, th, [Dose(0, 40, "oral")], TIMES, True)
        Xr, Sr = solve_states(m, th, [Dose(0, 40, "oral")], TIMES, True, method="expm")
        np.testing.assert_allclose(X, Xr, rtol=1e-9, atol=1e-14)
        np.testing.assert_allclose(S, Sr, rtol=1e-8, atol=1e-10 * np.abs(Sr).max())

    def test_transit_chain_repeated_eigenvalues(self):
        """transit-oral's identical transit rates give one eigenvalue four times: the fallback
        handles it (it equals the Erlang-type closed form checked in test_simulate via solve_ivp)."""
        m = compiled(load_template("transit-oral"))
        d = prepare(m, [([Dose(0, 100, "oral")], TIMES)])
        assert linear.solve(m, d.kernel, d.layout, m.defaults[None], False)[2].all()

    def test_complex_eigenvalues(self):
        """A one-way ring a → b → c → a (with elimination from a) has complex eigenvalues: the
        matrix exponential path takes it, and agrees with scipy's solve_ivp."""
        m = compile_model(parse_template(RING))
        th = m.param_vector(None)
        assert np.iscomplexobj(np.linalg.eigvals(m.linear_parts(th)[0]))
        d = prepare(m, [([Dose(0, 10)], TIMES)])
        assert linear.solve(m, d.kernel, d.layout, th[None], False)[2].all()
        doses = [Dose(0, 10), Dose(5, 10)]
        np.testing.assert_allclose(simulate(m, th, doses, TIMES).observable(), _ivp(m, th, doses, TIMES),
                                   rtol=1e-9, atol=1e-12)


RING = """
name = "ring"
description = "three compartments in a one-way ring"
kind = "pk"
time_unit = "h"

[states.a]
unit = "mg"

[states.b]
unit = "mg"

[states.c]
unit = "mg"

[parameters.k]
unit = "1/h"
default = 2.0
lower = 0.01
upper = 100.0

[parameters.ke]
unit = "1/h"
default = 0.1
lower = 0.001
upper = 10.0

[equations]
a = "-k*a + k*c - ke*a"
b = "k*a - k*b"
c = "k*b - k*c"

[doses.iv]
state = "a"

[observables.amount]
expression = "a"
unit = "mg"
"""


class TestBatch:
    def test_equals_per_subject_simulation(self):
        """One call for subjects with different doses, times, parameters and observables equals
        simulate() subject by subject to 1e-12, Jacobian included."""
        m = compiled(load_template("two-comp-oral"))
        rng = np.random.default_rng(3)
        subjects, thetas = [], []
        for s in range(12):
            doses = [Dose(float(t), float(rng.uniform(20, 200)), "oral") for t in np.cumsum(rng.uniform(4, 12, s % 4 + 1))]
            if s % 3 == 0:
                doses.append(Dose(60.0, 100.0, "oral", interval=12.0, steady_state=True, additional=1))
            times = np.sort(rng.uniform(0, 90, 5 + s))
            subjects.append((doses, times))
            th = m.param_vector(None) * np.exp(rng.normal(0, 0.3, m.n_params))
            th[m.parameter_names.index("tlag")] = 0.5 * (s % 2)
            thetas.append(th)
        design = prepare(m, subjects)
        y, J = design.evaluate(np.array(thetas), jacobian=True)
        for s, (doses, times) in enumerate(subjects):
            r = simulate(m, thetas[s], doses, times, sensitivities=True)
            rows = slice(design.offsets[s], design.offsets[s + 1])
            np.testing.assert_allclose(y[rows], r.observable(), rtol=1e-12, atol=1e-300)
            np.testing.assert_allclose(J[rows], r.sensitivity(), rtol=1e-12, atol=1e-14 * np.abs(J[rows]).max())

    def test_free_subset_and_shared_row(self):
        """A chosen subset of parameters gives those Jacobian columns; one row serves every subject."""
        m = compiled(load_template("one-comp-oral"))
        design = prepare(m, [([Dose(0, 100, "oral")], [1.0, 4.0]), ([Dose(0, 50, "oral")], [2.0])])
        _, J_all = design.evaluate(m.defaults, jacobian=True)
        y, J = design.evaluate(m.defaults, jacobian=True, free=[2, 0])
        np.testing.assert_array_equal(J, J_all[:, [2, 0]])
        assert y.shape == (3,) and design.n_subjects == 2

    def test_observable_index_and_nonlinear_models(self):
        """Several observables are picked per sample; a nonlinear model is evaluated subject by subject."""
        m = compiled(load_template("predator-prey"))
        times = np.array([0.5, 1.0, 2.0])
        design = prepare(m, [([], times, [0, 1, 1])])
        y, J = design.evaluate(m.defaults, jacobian=True)
        r = simulate(m, m.defaults, [], times, sensitivities=True)
        np.testing.assert_allclose(y, r.observables[[0, 1, 2], [0, 1, 1]], rtol=1e-12)
        np.testing.assert_allclose(J, r.observable_sensitivities[[0, 1, 2], [0, 1, 1]], rtol=1e-12)

    def test_bad_shapes_are_refused(self):
        """A parameter array of the wrong shape is refused with one line."""
        m = compiled(load_template("one-comp-iv"))
        design = prepare(m, [([Dose(0, 1)], [1.0])])
        with pytest.raises(Exception, match=r"theta must have shape \(1, 2\)"):
            design.evaluate(np.ones((2, 2)))
