"""Benchmark: the exact paths against the integrators on the same problems.

1 000 synthetic subjects of ``two-comp-oral``, 10 oral doses each at irregular times and
20 irregular sample times. All paths run side by side in one process, subject by
subject, so machine noise hits all alike. Reports time per subject for each path: the
eigen-decomposition engine (``method="auto"``), the augmented matrix exponential
(``method="expm"``, the path before the engine), LSODA driven by solve_ivp (the reference)
and by odeint (the integrator used for nonlinear templates), the ratios, and the largest
relative disagreement with solve_ivp.

Goals: the exact paths ≥ 10× faster than solve_ivp at ≤ 1e-8 relative difference (issue 2).

``--gap``: the accuracy study behind the engine's switch to the matrix exponential for
nearly repeated eigenvalues (``compartments.engine.linear.GAP``): with the switch turned
off, the engine against the matrix-exponential path for ka brought within a relative
distance δ of another eigenvalue, states and sensitivities.

Usage: python benchmarks/simulate.py [--subjects N] [--seed S] [--sensitivities] [--gap]
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
    ap.add_argument("--gap", action="store_true", help="the accuracy study behind the eigenvalue-gap threshold")
    args = ap.parse_args()
    if args.gap:
        gap_study()
        return
    model = compiled(load_template("two-comp-oral"))
    rng = np.random.default_rng(args.seed)
    subjects = make_subjects(args.subjects, rng)
    simulate(model, subjects[0][0], subjects[0][1], subjects[0][2], method="expm")  # warm-up
    simulate(model, subjects[0][0], subjects[0][1], subjects[0][2])
    t_eig = t_expm = t_ivp = t_ode = 0.0
    worst = worst_eig = 0.0
    for p, doses, times in subjects:
        t00 = time.perf_counter()
        e = simulate(model, p, doses, times, sensitivities=args.sensitivities)
        t0 = time.perf_counter()
        a = simulate(model, p, doses, times, method="expm", sensitivities=args.sensitivities)
        t1 = time.perf_counter()
        b = simulate(model, p, doses, times, method="ivp", rtol=1e-11, sensitivities=args.sensitivities)
        t2 = time.perf_counter()
        simulate(model, p, doses, times, method="ode", rtol=1e-11, sensitivities=args.sensitivities)
        t3 = time.perf_counter()
        t_eig += t0 - t00
        t_expm += t1 - t0
        t_ivp += t2 - t1
        t_ode += t3 - t2
        ya, yb = a.observable(), b.observable()
        worst = max(worst, float(np.max(np.abs(ya - yb) / np.maximum(np.abs(yb), 1e-12 * np.abs(yb).max()))))
        ye = e.observable()
        worst_eig = max(worst_eig, float(np.max(np.abs(ye - yb) / np.maximum(np.abs(yb), 1e-12 * np.abs(yb).max()))))
    n = len(subjects)
    print(f"two-comp-oral, {n} subjects × 10 doses × 20 samples, sensitivities={args.sensitivities}")
    print(f"eigen engine       : {1e3 * t_eig / n:8.3f} ms per subject")
    print(f"matrix exponential : {1e3 * t_expm / n:8.3f} ms per subject")
    print(f"solve_ivp (LSODA, rtol 1e-11): {1e3 * t_ivp / n:8.3f} ms per subject")
    print(f"odeint (LSODA, rtol 1e-11)   : {1e3 * t_ode / n:8.3f} ms per subject")
    print(f"speed ratio vs solve_ivp : engine {t_ivp / t_eig:8.1f}×, matrix exponential {t_ivp / t_expm:8.1f}×  (goal ≥ 10×)")
    print(f"speed ratio vs odeint    : engine {t_ode / t_eig:8.1f}×, matrix exponential {t_ode / t_expm:8.1f}×")
    print(f"engine vs matrix exponential: {t_expm / t_eig:8.1f}×")
    print(f"max relative diff to solve_ivp: engine {worst_eig:.2e}, matrix exponential {worst:.2e}  (goal ≤ 1e-8)")


def gap_study() -> None:
    """Engine (switch off) against the matrix exponential as two eigenvalues approach."""
    from compartments.engine import linear, prepare, solve_states

    saved, linear.GAP = linear.GAP, 0.0
    try:
        t = np.array([0.05, 0.5, 1, 2, 4, 8, 12, 24, 48, 96.0])
        doses = [Dose(0, 100, "oral"), Dose(12, 100, "oral"), Dose(24, 100, "oral", interval=12, steady_state=True)]
        print("relative gap δ   one-comp-oral (ka = ke(1+δ))      two-comp-oral (ka = β(1+δ))")
        print("                 states      sensitivities         states      sensitivities")
        rows = []
        for name, base in (("one-comp-oral", {"ka": 0.25, "ke": 0.25, "V": 12}),
                           ("two-comp-oral", {"k10": 0.2, "k12": 0.5, "k21": 0.3, "V1": 10})):
            m = compiled(load_template(name))
            th0 = m.param_vector(base)
            if name == "two-comp-oral":
                s_, d_ = 1.0, np.sqrt(1.0 - 4 * 0.2 * 0.3)
                th0[0] = (s_ - d_) / 2  # β, the slow disposition eigenvalue
            out = []
            for rel in 10.0 ** -np.arange(1, 9):
                th = th0.copy()
                th[0] *= 1 + rel
                Xr, Sr = solve_states(m, th, doses, t, True, method="expm")
                X, S, _ = prepare(m, [(doses, t)], max_lag={"oral": 0.0}).states(th[None], sensitivities=True)
                ex = float(np.max(np.abs(X - Xr) / np.maximum(np.abs(Xr), 1e-12 * np.abs(Xr).max())))
                out.append((rel, ex, float(np.max(np.abs(S - Sr)) / np.abs(Sr).max())))
            rows.append(out)
        for a, b in zip(*rows, strict=True):
            print(f"{a[0]:8.0e}         {a[1]:9.1e}   {a[2]:9.1e}              {b[1]:9.1e}   {b[2]:9.1e}")
        print(f"threshold in use: GAP = {saved:g} (eigen path for δ ≥ GAP)")
    finally:
        linear.GAP = saved


if __name__ == "__main__":
    main()
