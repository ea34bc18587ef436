"""Benchmark: exact (matrix-exponential) path against the integrators on the same problems.

1 000 synthetic subjects of ``two-comp-oral``, 10 oral doses each at irregular times and
20 irregular sample times. All paths run side by side in one process, subject by
subject, so machine noise hits all alike. Reports time per subject for each path (LSODA
driven by solve_ivp, the issue's reference, and by odeint, the integrator used for nonlinear
templates), the ratios, and the largest relative disagreement with solve_ivp.

Goal (issue 2): the exact path ≥ 10× faster at ≤ 1e-8 relative difference.

Usage: python benchmarks/simulate.py [--subjects N] [--seed S] [--sensitivities]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from compartments import Dose, load_template
from compartments.model import compiled
from compartments.simulate import simulate


def make_subjects(n: int, rng: np.random.Generator) -> list[tuple[dict, list[Dose], np.ndarray]]:
    out = []
    for _ in range(n):
        p = {
            "ka": float(np.exp(rng.uniform(np.log(0.3), np.log(3.0)))),
            "k10": float(np.exp(rng.uniform(np.log(0.05), np.log(0.5)))),
            "k12": float(np.exp(rng.uniform(np.log(0.05), np.log(1.0)))),
            "k21": float(np.exp(rng.uniform(np.log(0.05), np.log(1.0)))),
            "V1": float(np.exp(rng.uniform(np.log(5.0), np.log(50.0)))),
        }
        dose_times = np.cumsum(np.r_[0.0, rng.uniform(8.0, 16.0, 9)])
        doses = [Dose(float(t), float(rng.uniform(50, 200)), "oral") for t in dose_times]
        times = np.sort(rng.uniform(0.1, dose_times[-1] + 24.0, 20))
        out.append((p, doses, times))
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--subjects", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--sensitivities", action="store_true", help="also propagate parameter sensitivities")
    args = ap.parse_args()
    model = compiled(load_template("two-comp-oral"))
    rng = np.random.default_rng(args.seed)
    subjects = make_subjects(args.subjects, rng)
    simulate(model, subjects[0][0], subjects[0][1], subjects[0][2], method="expm")  # warm-up
    t_expm = t_ivp = t_ode = 0.0
    worst = 0.0
    for p, doses, times in subjects:
        t0 = time.perf_counter()
        a = simulate(model, p, doses, times, method="expm", sensitivities=args.sensitivities)
        t1 = time.perf_counter()
        b = simulate(model, p, doses, times, method="ivp", rtol=1e-11, sensitivities=args.sensitivities)
        t2 = time.perf_counter()
        simulate(model, p, doses, times, method="ode", rtol=1e-11, sensitivities=args.sensitivities)
        t3 = time.perf_counter()
        t_expm += t1 - t0
        t_ivp += t2 - t1
        t_ode += t3 - t2
        ya, yb = a.observable(), b.observable()
        worst = max(worst, float(np.max(np.abs(ya - yb) / np.maximum(np.abs(yb), 1e-12 * np.abs(yb).max()))))
    n = len(subjects)
    print(f"two-comp-oral, {n} subjects × 10 doses × 20 samples, sensitivities={args.sensitivities}")
    print(f"matrix exponential : {1e3 * t_expm / n:8.3f} ms per subject")
    print(f"solve_ivp (LSODA, rtol 1e-11): {1e3 * t_ivp / n:8.3f} ms per subject")
    print(f"odeint (LSODA, rtol 1e-11)   : {1e3 * t_ode / n:8.3f} ms per subject")
    print(f"speed ratio vs solve_ivp : {t_ivp / t_expm:8.1f}×  (goal ≥ 10×)")
    print(f"speed ratio vs odeint    : {t_ode / t_expm:8.1f}×")
    print(f"max relative diff  : {worst:.2e}  (goal ≤ 1e-8)")


if __name__ == "__main__":
    main()
