"""Benchmark: the two LSODA drivers for nonlinear templates, side by side.

``simulate(method="ode")`` (the default for nonlinear templates) drives LSODA through
``scipy.integrate.odeint``, whose step loop is compiled, and evaluates the generated
right-hand side on Python floats; ``method="ivp"`` drives the same LSODA from Python through
``scipy.integrate.solve_ivp``. The likelihood fits of nonlinear templates spend most of
their time here (states plus forward sensitivities, rtol 1e-8, as the estimator calls it).

Each problem: a template's parameters drawn log-uniformly over a factor 3 around the
defaults, 12 irregular sample times; both drivers on the same problem one after the other.
Reports time per simulation, the ratio, and the largest relative difference of the
observables and of their sensitivities (scaled by each column's largest value).

Usage: python benchmarks/ode_driver.py [--problems N] [--seed S]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from compartments import Dose, load_template
from compartments.model import compiled
from compartments.simulate import simulate

CASES = {  # template: (doses, horizon)
    "one-comp-mm": ([Dose(0.0, 100.0, "iv"), Dose(12.0, 100.0, "iv")], 36.0),
    "predator-prey": ([], 30.0),
    "sir": ([], 60.0),
}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--problems", type=int, default=100, help="per template")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    print(f"{args.problems} problems per template, states + sensitivities, rtol 1e-8")
    print()
    print("| template | odeint ms | solve_ivp ms | ratio | max rel diff (obs) | max rel diff (sens) |")
    print("|---|---|---|---|---|---|")
    calls = []
    for name, (doses, horizon) in CASES.items():
        t = load_template(name)
        m = compiled(t)
        simulate(m, None, doses, [1.0], sensitivities=True)  # warm-up (compilation)
        t_a = t_b = 0.0
        d_obs = d_sens = 0.0
        for _ in range(args.problems):
            theta = {p.name: p.default * float(np.exp(rng.uniform(-np.log(3), np.log(3)))) for p in t.parameters
                     if not p.fixed}
            times = np.sort(rng.uniform(0.05, horizon, 12))
            t0 = time.perf_counter()
            a = simulate(m, theta, doses, times, sensitivities=True, method="ode")
            t1 = time.perf_counter()
            b = simulate(m, theta, doses, times, sensitivities=True, method="ivp")
            t2 = time.perf_counter()
            t_a += t1 - t0
            t_b += t2 - t1
            ya, yb = a.observables, b.observables
            d_obs = max(d_obs, float(np.max(np.abs(ya - yb) / np.max(np.abs(yb), axis=0, keepdims=True))))
            sa, sb = a.observable_sensitivities, b.observable_sensitivities
            scale = np.maximum(np.max(np.abs(sb), axis=0, keepdims=True), 1e-300)
            d_sens = max(d_sens, float(np.max(np.abs(sa - sb) / scale)))
        n = args.problems
        print(f"| {name} | {1e3 * t_a / n:.2f} | {1e3 * t_b / n:.2f} | {t_b / t_a:.1f}× | {d_obs:.1e} | {d_sens:.1e} |")
        calls.append((name, *_rhs_call_times(m)))
    print()
    print("One call of the generated right-hand side with sensitivities, on NumPy scalars (as")
    print("`np.asarray(f(*z, *θ))`) and on Python floats (`Model.rhs_point`), side by side:")
    print()
    print("| template | NumPy scalars µs | Python floats µs | ratio |")
    print("|---|---|---|---|")
    for name, a, b in calls:
        print(f"| {name} | {a:.2f} | {b:.2f} | {a / b:.1f}× |")


def _rhs_call_times(m, repeat: int = 20_000) -> tuple[float, float]:
    import timeit

    theta = m.param_vector(None)
    z = np.linspace(0.5, 1.5, m.n_states * (m.n_params + 1))
    fast = m.rhs_point(theta, True)
    aug = m._aug
    a = min(timeit.repeat(lambda: np.asarray(aug(*z, *theta), dtype=float), number=repeat, repeat=3)) / repeat
    b = min(timeit.repeat(lambda: fast(z), number=repeat, repeat=3)) / repeat
    return 1e6 * a, 1e6 * b


if __name__ == "__main__":
    main()
