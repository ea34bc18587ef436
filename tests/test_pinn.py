"""The physics-informed network stage (compartments.estimate.pinn, .collocation).

Reference curves are computed here from published closed forms or with scipy's own
integrator, never with the package's simulator. Tolerances on parameters are loose on
purpose: the stage only has to put the likelihood stage in the right basin, and the
finite hidden layer leaves a bias of a few per cent.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from types import SimpleNamespace

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from compartments import Dose
from compartments.estimate.collocation import Collocation, Settings
from compartments.estimate.pinn import NetworkStage, exact_misfit
from compartments.estimate.problem import make_problem
from compartments.library import load_template
from compartments.model import compiled


def _problem(template: str, times, values, doses, *, observables=None, censored=None, lloq=None,
             error: str = "proportional"):
    n = len(times)
    subject = SimpleNamespace(
        id="s1",
        times=np.asarray(times, dtype=float),
        values=np.asarray(values, dtype=float),
        observables=list(observables) if observables is not None else [None] * n,
        censored=np.zeros(n, bool) if censored is None else np.asarray(censored, bool),
        lloq=np.full(n, np.nan) if lloq is None else np.asarray(lloq, float),
        doses=tuple(doses),
    )
    return make_problem(compiled(load_template(template)), [subject], error=error)


def _theta(problem, phi):
    return dict(zip(problem.names, problem.to_theta_free(phi), strict=True))


# -- reference curves --------------------------------------------------------------------
def bateman(t, dose, ka, ke, V):
    """One-compartment oral concentration (Bateman 1910; Gibaldi & Perrier 1982, eq. 2.9)."""
    return dose * ka / (V * (ka - ke)) * (np.exp(-ke * t) - np.exp(-ka * t))


def biexponential(t, dose, k10, k12, k21, V1):
    """Two-compartment IV bolus concentration from micro-constants (Gibaldi & Perrier 1982, ch. 2)."""
    s = k10 + k12 + k21
    root = np.sqrt(s * s - 4 * k10 * k21)
    alpha, beta = (s + root) / 2, (s - root) / 2
    A = dose / V1 * (alpha - k21) / (alpha - beta)
    B = dose / V1 * (k21 - beta) / (alpha - beta)
    return A * np.exp(-alpha * t) + B * np.exp(-beta * t)


def infusion_one_comp(t, amount, duration, ke, V):
    """One-compartment zero-order infusion (Gibaldi & Perrier 1982, eq. 1.121 and after)."""
    rate = amount / duration
    during = rate / (ke * V) * (1 - np.exp(-ke * np.minimum(t, duration)))
    return np.where(t <= duration, during, during * np.exp(-ke * (t - duration)))


def lotka_volterra(t, alpha, beta, delta, gamma, prey0, predator0):
    """Prey and predator counts (Lotka 1925; Volterra 1926), integrated by scipy's DOP853."""
    def f(_, x):
        return [alpha * x[0] - beta * x[0] * x[1], delta * x[0] * x[1] - gamma * x[1]]

    sol = solve_ivp(f, (0, float(np.max(t))), [prey0, predator0], t_eval=t, method="DOP853",
                    rtol=1e-11, atol=1e-10)
    return sol.y


# -- recovery ----------------------------------------------------------------------------
class TestRecovery:
    def test_one_comp_oral_far_from_defaults(self):
        """Noiseless Bateman data, truth 5–8× from every default: phi within 20 % of truth."""
        truth = dict(ka=8.0, ke=0.5, V=200.0)  # defaults 1, 0.1, 30 (templates/one-comp-oral.toml)
        t = np.array([0.08, 0.2, 0.45, 0.9, 1.6, 2.7, 4.1, 6.3, 9.5])
        y = bateman(t, 500.0, **truth)
        problem = _problem("one-comp-oral", t, y, [Dose(0.0, 500.0, "oral")])
        res = NetworkStage(seed=0).run(problem, [problem.default_phi])
        assert res.status == "converged", res.message
        est = _theta(problem, res.phi)
        for name, value in truth.items():
            # 20 %: enough to start the likelihood stage in the right basin
            assert est[name] == pytest.approx(value, rel=0.2), (name, est)

    def test_two_comp_iv_biexponential(self):
        """Noiseless biexponential data, truth 5× from every default: phi within 20 % of truth."""
        truth = dict(k10=0.04, k12=2.5, k21=1.5, V1=50.0)  # defaults 0.2, 0.5, 0.3, 10
        t = np.array([0.05, 0.15, 0.3, 0.6, 1.2, 3.0, 8.0, 20.0, 48.0, 96.0])
        y = biexponential(t, 100.0, **truth)
        problem = _problem("two-comp-iv", t, y, [Dose(0.0, 100.0, "iv")])
        res = NetworkStage(seed=0).run(problem, [problem.default_phi])
        est = _theta(problem, res.phi)
        for name, value in truth.items():
            assert est[name] == pytest.approx(value, rel=0.2), (name, est)

    def test_one_comp_infusion(self):
        """A zero-order infusion enters as a constant input over its pieces."""
        truth = dict(ke=0.35, V=80.0)  # defaults 0.1, 20 (templates/one-comp-infusion.toml)
        t = np.array([0.5, 1.0, 1.9, 2.5, 3.5, 5.0, 8.0, 12.0])
        y = infusion_one_comp(t, 400.0, 2.0, **truth)
        problem = _problem("one-comp-infusion", t, y, [Dose(0.0, 400.0, "infusion", duration=2.0)])
        res = NetworkStage(seed=0).run(problem, [problem.default_phi])
        est = _theta(problem, res.phi)
        for name, value in truth.items():
            assert est[name] == pytest.approx(value, rel=0.2), (name, est)

    def test_lag_time_estimated(self):
        """An estimated absorption lag is found by the lag grid and the exact polish."""
        truth = dict(ka=2.0, ke=0.15, V=40.0, tlag=0.6)
        t = np.array([0.25, 0.5, 0.9, 1.3, 2.0, 3.0, 5.0, 8.0, 12.0, 24.0])
        y = np.where(t > truth["tlag"], bateman(np.maximum(t - truth["tlag"], 0.0), 300.0, 2.0, 0.15, 40.0), 0.0)
        subject = SimpleNamespace(id="s1", times=t, values=y, observables=[None] * t.size,
                                  censored=np.zeros(t.size, bool), doses=(Dose(0.0, 300.0, "oral"),))
        problem = make_problem(compiled(load_template("one-comp-oral")), [subject], error="proportional",
                               estimate=("tlag",))
        res = NetworkStage(seed=0).run(problem, [problem.default_phi])
        est = _theta(problem, res.phi)
        for name, value in truth.items():
            assert est[name] == pytest.approx(value, rel=0.2), (name, est)

    def test_predator_prey_prey_only(self):
        """Only prey counted: the predator is reconstructed through the physics.

        With prey alone, β and predator0 enter only as their product (rescaling the
        predator leaves the prey curve unchanged), so that product is compared.
        """
        truth = dict(alpha=1.1, beta=0.04, delta=0.03, gamma=0.9, prey0=45.0, predator0=12.0)
        rng = np.random.default_rng(0)
        t = np.sort(rng.uniform(0.2, 20.0, 25))
        prey = lotka_volterra(t, **truth)[0]
        problem = _problem("predator-prey", t, prey, [], observables=["prey"] * t.size)
        res = NetworkStage(seed=0).run(problem, [problem.default_phi])
        pred, _ = problem.predict(res.phi)
        rms = float(np.sqrt(np.mean(((pred - prey) / prey) ** 2)))
        assert rms < 0.10, rms
        est = _theta(problem, res.phi)
        for name in ("alpha", "delta", "gamma", "prey0"):
            # 30 %: basin-finding only, on a two-state system seen through one state
            assert est[name] == pytest.approx(truth[name], rel=0.3), (name, est)
        assert est["beta"] * est["predator0"] == pytest.approx(truth["beta"] * truth["predator0"], rel=0.3)


# -- determinism -------------------------------------------------------------------------
def _oral_problem():
    t = np.array([0.3, 0.7, 1.1, 2.0, 3.5, 5.0, 8.0, 12.0, 24.0])
    rng = np.random.default_rng(3)
    y = bateman(t, 320.0, 1.6, 0.08, 40.0) * np.exp(0.1 * rng.standard_normal(t.size))
    return _problem("one-comp-oral", t, y, [Dose(0.0, 320.0, "oral")])


class TestDeterminism:
    def test_same_seed_bit_identical(self):
        """Two runs with the same inputs and seed give identical bits."""
        problem = _oral_problem()
        a = NetworkStage(seed=7).run(problem, [problem.default_phi])
        b = NetworkStage(seed=7).run(problem, [problem.default_phi])
        assert a.phi.tobytes() == b.phi.tobytes()
        assert len(a.candidates) == len(b.candidates)
        assert all(x.tobytes() == y.tobytes() for x, y in zip(a.candidates, b.candidates, strict=True))
        assert a.objective == b.objective

    def test_threads_setting_does_not_change_result(self):
        """threads=1 and threads=2 give identical output."""
        problem = _oral_problem()
        a = NetworkStage(seed=1, threads=1).run(problem, [problem.default_phi])
        b = NetworkStage(seed=1, threads=2).run(problem, [problem.default_phi])
        assert a.phi.tobytes() == b.phi.tobytes()

    def test_blas_threads_do_not_change_result(self):
        """The same stage in processes with 1 and 2 BLAS threads gives identical bits."""
        code = textwrap.dedent(
            f"""
            import sys
            sys.path.insert(0, {os.path.dirname(__file__)!r})
            from test_pinn import _oral_problem
            from compartments.estimate.pinn import NetworkStage
            p = _oral_problem()
            r = NetworkStage(seed=2).run(p, [p.default_phi])
            print(r.phi.tobytes().hex())
            """
        )
        out = []
        for n in ("1", "2"):
            env = dict(os.environ, OPENBLAS_NUM_THREADS=n, OMP_NUM_THREADS=n, MKL_NUM_THREADS=n)
            run = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120)
            assert run.returncode == 0, run.stderr
            out.append(run.stdout.strip().splitlines()[-1])
        assert out[0] == out[1]


# -- odd data ----------------------------------------------------------------------------
class TestFailurePath:
    @pytest.mark.parametrize(
        "values, censored, why",
        [
            ([0.0, 0.0, 0.0, 0.0], None, "zero"),
            ([1.0, 0.5, 0.2, 0.1], [True, True, True, True], "quantified"),
            ([1.0], None, "observation"),
        ],
    )
    def test_degenerate_data_fails_softly(self, values, censored, why):
        """Degenerate data give status 'failed', a reason and the best start; nothing raises."""
        t = [1.0, 2.0, 4.0, 8.0][: len(values)]
        problem = _problem("one-comp-oral", t, values, [Dose(0.0, 100.0, "oral")], censored=censored,
                           lloq=[0.05] * len(values))
        start = problem.default_phi
        res = NetworkStage(seed=0).run(problem, [start])
        assert res.status == "failed"
        assert why in res.message
        assert np.array_equal(res.phi, start)

    def test_nonfinite_value_fails_softly(self):
        """A NaN among the values is reported, not raised."""
        problem = _problem("one-comp-oral", [1.0, 2.0, 4.0, 8.0], [1.0, np.nan, 0.5, 0.2],
                           [Dose(0.0, 100.0, "oral")])
        res = NetworkStage(seed=0).run(problem, [problem.default_phi])
        assert res.status == "failed"

    def test_unknown_setting_is_a_usage_error(self):
        """A misspelt setting names the known ones."""
        from compartments.errors import UsageError

        with pytest.raises(UsageError, match="physics_weight"):
            NetworkStage(physics_wieght=3.0)


# -- pieces ------------------------------------------------------------------------------
class TestCollocation:
    def test_jacobians_match_finite_differences(self):
        """Residual Jacobians in the output weights and in θ agree with central differences."""
        t = np.array([0.5, 1.0, 2.0, 3.0, 5.0, 8.0, 12.0, 12.5, 14.0, 18.0, 24.0])
        doses = [Dose(0.0, 100.0, "infusion", duration=1.5), Dose(12.0, 100.0, "iv")]
        y = biexponential(t, 100.0, 0.2, 0.5, 0.3, 10.0) + 0.1
        problem = _problem("two-comp-iv", t, y, doses)
        col = Collocation(problem, Settings(samples_per_piece=4))
        sub = col.subjects[0]
        theta = problem.full_theta(problem.default_phi + 0.1)
        lay = sub.layout(theta)
        ctx = sub.context(theta, lay, True, 3.0)
        z = sub.initial_weights(ctx, lay) + 0.05 * np.random.default_rng(0).standard_normal(lay.n_pieces * col.n * col.M)
        _, Jz, Jt = sub.residual(z, ctx, lay, True, True)

        def r(z_, th):
            return sub.residual(z_, sub.context(th, lay, False, 3.0), lay, False, False)[0]

        h = 1e-6
        Jz_fd = np.array([(r(z + h * e, theta) - r(z - h * e, theta)) / (2 * h) for e in np.eye(z.size)]).T
        Jt_fd = np.array([(r(z, theta + hh * e) - r(z, theta - hh * e)) / (2 * hh)
                          for e, hh in zip(np.eye(theta.size), 1e-6 * np.maximum(1, np.abs(theta)), strict=True)]).T
        assert lay.n_pieces == 4  # infusion end and the bolus cut the axis; 5 samples split one interval
        assert np.abs(Jz - Jz_fd).max() < 1e-6 * np.abs(Jz).max()
        assert np.abs(Jt - Jt_fd).max() < 1e-6 * np.abs(Jt).max()

    def test_exact_misfit_counts_censored_only_above_limit(self):
        """A censored row adds nothing while the prediction stays below its limit."""
        t = np.array([0.5, 1.0, 2.0, 4.0, 24.0])
        y = bateman(t, 100.0, 1.0, 0.1, 30.0)
        cens = [False, False, False, False, True]
        lloq = [np.nan] * 4 + [10.0]
        problem = _problem("one-comp-oral", t, np.r_[y[:4], 10.0], [Dose(0.0, 100.0, "oral")],
                           censored=cens, lloq=lloq)
        phi = problem.to_phi(np.array([1.0, 0.1, 30.0]))
        # the exact curve reproduces the four quantified values (Bateman) and stays < 10 at 24 h
        assert exact_misfit(problem, phi) < 1e-12
