"""Benchmark: where the time of a nonlinear simulation with sensitivities goes, and what helps.

For one-comp-mm (two IV doses), predator-prey, sir and enzyme-substrate at the template
defaults, 12 samples over 24 time units, states and sensitivities (LSODA via odeint,
rtol 1e-8), side by side in one process:

* evaluations of the right-hand side per simulation, and the whole simulation's time;
* one call of the generated right-hand side with sensitivities: as generated for the
  integrator (sympy, NumPy module, on Python floats), with the ``math`` module, and —
  if numba is installed (it is not a dependency) — compiled by numba into a preallocated
  array, and the whole simulation with that numba function in the loop;
* error control on the states only (sensitivities carried with the same steps, a huge
  absolute tolerance on them): evaluations, time, and the error of observables and
  sensitivities against rtol 1e-12, beside the default (all components controlled).

Usage: python benchmarks/nonlinear_rhs.py [--repeats R]
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np
import sympy as sp

from compartments import Dose, load_template
from compartments.engine import ode
from compartments.model import compiled
from compartments.simulate import simulate

CASES = {"one-comp-mm": [Dose(0, 100), Dose(12, 100)], "predator-prey": [], "sir": [], "enzyme-substrate": []}
T = np.linspace(0.5, 24, 12)


def generated(model, module: str | None):
    """States + sensitivities right-hand side: sympy lambdify (``module``), or, with None, Python
    source writing into an output array (for numba)."""
    t = model.template
    xs = [sp.Symbol(n, real=True) for n in t.state_names]
    ps = [sp.Symbol(n, real=True) for n in t.parameter_names]
    by = {s.name: s for s in xs + ps}
    f = sp.Matrix([t.equations[s].xreplace({q: by[q.name] for q in t.equations[s].free_symbols if q.name in by})
                   for s in t.state_names])
    n, p = len(xs), len(ps)
    S = sp.Matrix(n, p, lambda i, j: sp.Symbol(f"s{i}_{j}"))
    sens = f.jacobian(xs) * S + f.jacobian(ps)
    exprs = list(f) + [sens[i, j] for j in range(p) for i in range(n)]
    flat_S = [S[i, j] for j in range(p) for i in range(n)]
    if module is not None:
        return sp.lambdify(xs + flat_S + ps, exprs, modules=module, cse=True)
    subs, red = sp.cse(exprs)
    lines = ["def rhs(z, th, out):"]
    lines += [f"    {x.name} = z[{i}]" for i, x in enumerate(xs + flat_S)]
    lines += [f"    {q.name} = th[{j}]" for j, q in enumerate(ps)]
    lines += [f"    {a} = {sp.pycode(b)}" for a, b in subs]
    lines += [f"    out[{k}] = {sp.pycode(e)}" for k, e in enumerate(red)]
    ns: dict = {"math": math}
    exec("\n".join(lines), ns)  # noqa: S102 - source generated here from a shipped template
    return ns["rhs"]


def per_call_us(f, k: int = 20000) -> float:
    t0 = time.perf_counter()
    for _ in range(k):
        f()
    return (time.perf_counter() - t0) / k * 1e6


def per_sim_ms(f, repeats: int) -> float:
    f()
    t0 = time.perf_counter()
    for _ in range(repeats):
        f()
    return (time.perf_counter() - t0) / repeats * 1e3


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=30)
    args = ap.parse_args()
    try:
        import numba
    except ImportError:
        numba = None
    print(f"{'template':17s} {'evals':>6s} {'sim ms':>7s} | {'rhs µs: numpy':>13s} {'math':>6s} {'numba':>6s} | "
          f"{'sim ms numba':>12s} | {'states-only: evals':>18s} {'sim ms':>7s} {'obs err':>8s} {'sens err':>8s} "
          f"{'(default errs)':>18s}")
    orig = ode.lsoda_odeint
    for name, doses in CASES.items():
        m = compiled(load_template(name))
        th = [float(v) for v in m.defaults]
        N = m.n_states * (m.n_params + 1)
        z = np.random.default_rng(0).uniform(0.5, 1.5, N)
        count = [0]

        def counted(fun, jac, z0, grid, a, rtol, atol, states_only=False, n=m.n_states, count=count):
            if states_only:
                atol = np.r_[np.full(n, atol), np.full(z0.size - n, 1e300)]

            def f(*x):
                count[0] += 1
                return fun(*x)
            return orig(f, jac, z0, grid, a, rtol, atol)

        def run(m=m, doses=doses):
            return simulate(m, None, doses, T, sensitivities=True, method="ode")
        ref = simulate(m, None, doses, T, sensitivities=True, method="ode", rtol=1e-12)
        ode.lsoda_odeint = counted
        count[0] = 0
        base = run()
        evals = count[0]
        ode.lsoda_odeint = orig
        sim = per_sim_ms(run, args.repeats)
        gnp, gmath = m._aug, generated(m, "math")
        us_np = per_call_us(lambda gnp=gnp, th=th, z=z: np.array(gnp(*z.tolist(), *th)))
        us_math = per_call_us(lambda gmath=gmath, th=th, z=z: np.array(gmath(*z.tolist(), *th)))
        us_nb = sim_nb = float("nan")
        if numba is not None:
            jit = numba.njit(generated(m, None))
            tha = np.array(th)
            jit(z, tha, np.empty(N))
            us_nb = per_call_us(lambda jit=jit, tha=tha, N=N, z=z: jit(z, tha, np.empty(N)))
            saved = ode.OdePropagator._fun
            ode.OdePropagator._fun = lambda self, cols, jit=jit, tha=tha, N=N: _numba_fun(jit, tha, N)
            sim_nb = per_sim_ms(run, args.repeats)
            ode.OdePropagator._fun = saved
        ode.lsoda_odeint = lambda *a: counted(*a, states_only=True)
        count[0] = 0
        so = run()
        evals_so = count[0]
        sim_so = per_sim_ms(run, args.repeats)
        ode.lsoda_odeint = orig

        def err(r, ref=ref):
            return (float(np.max(np.abs(r.observables - ref.observables)) / np.abs(ref.observables).max()),
                    float(np.max(np.abs(r.observable_sensitivities - ref.observable_sensitivities))
                          / np.abs(ref.observable_sensitivities).max()))
        e_so, e_base = err(so), err(base)
        print(f"{name:17s} {evals:6d} {sim:7.2f} | {us_np:13.2f} {us_math:6.2f} {us_nb:6.2f} | {sim_nb:12.2f} | "
              f"{evals_so:18d} {sim_so:7.2f} {e_so[0]:8.1e} {e_so[1]:8.1e} {e_base[0]:8.1e} {e_base[1]:8.1e}")


def _numba_fun(jit, tha: np.ndarray, n: int):
    """The integrator's callback with the numba function inside (no evaluation budget)."""

    def fun(_t, z, c):
        out = np.empty(n)
        jit(z, tha, out)
        if c is not None:
            out += c
        return out

    return fun


if __name__ == "__main__":
    main()
