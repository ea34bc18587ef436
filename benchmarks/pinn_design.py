"""Benchmark: the physics-informed network stage on synthetic problems, and its design.

For each template, ``--per-template`` synthetic subjects (default 10): irregular sample
times, proportional log-normal noise (10 %, or 20 % with ``--hard``), true parameters
drawn around the template defaults (``--hard``: 3–15 times away, sparser samples,
repeated oral doses, a short infusion). Only the template defaults are given as a start.

Printed per template:

* wall and CPU time of the stage (median, 90th percentile), one BLAS thread;
* ``truth×1.5``: fraction where the stage's parameters all lie within a factor 1.5 of
  the truth (for predator–prey observed through the prey only, β and predator0 are not
  identifiable apart, so their product is compared instead);
* ``opt×1.5``: the same against the global optimum of the likelihood (the estimate the
  data support: the best likelihood-stage result from the truth, the defaults and the
  stage's point); ``opt in truth×1.5`` shows how often that optimum itself is that close;
* ``basin``: fraction where the likelihood stage started from the stage's point alone
  reaches the global optimum; ``basin(defaults)``: the same from the defaults alone.

``--compare-trained N`` also runs the gradient-trained alternative (a 2×32 tanh network
trained with Adam then L-BFGS in torch, parameters squashed into their bounds) on the
first N one-compartment oral problems, for the design notes in
:mod:`compartments.estimate.pinn`.

``--compare-backend N`` times the stage's linear-algebra core (normal equations, Cholesky
solve, projected Jacobian) on the matrices of N problems per template, in NumPy/SciPy and in
torch (float64, one thread, tensors built outside the timing), beside the whole profiled
evaluation it is part of: the measurement behind keeping this stage in NumPy.

``--positivity N`` reports how far the amount-state trajectories (linear in the output
weights, so not positive by construction) dip below zero at the stage's returned point.

``--ablation N`` changes one setting at a time (physics weight, continuation, polish,
hidden units, no screening) on N problems per template; ``--representation N`` reports
the profiled loss at the likelihood optimum with the log clock or the log-state
representation switched off (the loss is ~ the exact misfit when the hidden layer
represents the solution well).

Usage: python benchmarks/pinn_design.py [--per-template N] [--hard] [--compare-trained N]
       [--ablation N] [--representation N] [--compare-backend N] [--positivity N]
       [--templates a,b]
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from functools import partial  # noqa: E402

import numpy as np  # noqa: E402

TEMPLATES = ("one-comp-oral", "two-comp-iv", "two-comp-oral", "one-comp-mm", "predator-prey", "sir")


def _log_uniform(rng: np.random.Generator, a: float, b: float) -> float:
    return float(np.exp(rng.uniform(np.log(a), np.log(b))))


def _jitter(rng: np.random.Generator, t, spread: float = 0.15) -> np.ndarray:
    t = np.asarray(t, dtype=float)
    return np.sort(t * np.exp(rng.uniform(-spread, spread, t.size)))


def _far(rng: np.random.Generator, model, names, lo: float = 3.0, hi: float = 15.0) -> dict:
    out = {}
    for name in names:
        p = model.template.parameter(name)
        v = p.default * np.exp(rng.choice([-1.0, 1.0]) * rng.uniform(np.log(lo), np.log(hi)))
        out[name] = float(np.clip(v, 3 * p.lower, p.upper / 3))
    return out


def make_problem(name: str, k: int, hard: bool = False):
    """A synthetic one-subject problem: (Problem, true full θ)."""
    from compartments import Dose
    from compartments.estimate.problem import Problem, SubjectData
    from compartments.library import load_template
    from compartments.model import compiled

    rng = np.random.default_rng(1000 + k + (5000 if hard else 0))
    m = compiled(load_template(name))
    noise = 0.2 if hard else 0.1
    obs = None
    if name == "one-comp-oral":
        if hard:
            while True:
                th = _far(rng, m, ["ka", "ke", "V"])
                if th["ka"] > 2 * th["ke"]:
                    break
            t = _jitter(rng, [0.5, 1, 3, 6, 10, 24], 0.3)
            doses = [Dose(0, 500, "oral")]
        else:
            ka, ke = _log_uniform(rng, 0.3, 8), _log_uniform(rng, 0.02, 0.4)
            ka, ke = max(ka, ke), min(ka, ke)
            ka = ka if ka >= 1.5 * ke else 1.5 * ke * _log_uniform(rng, 1, 3)
            th = dict(ka=ka, ke=ke, V=_log_uniform(rng, 5, 300))
            t = _jitter(rng, [0.25, 0.5, 1, 2, 3.5, 5, 8, 12, 24])
            doses = [Dose(0, 320, "oral")]
    elif name == "two-comp-iv":
        if hard:
            th = _far(rng, m, ["k10", "k12", "k21", "V1"], 2, 8)
            t = _jitter(rng, [0.1, 0.5, 1, 3, 6, 12, 24], 0.3)
            doses = [Dose(0, 100, "infusion", duration=0.5)]
        else:
            th = dict(k10=_log_uniform(rng, 0.05, 0.8), k12=_log_uniform(rng, 0.2, 2),
                      k21=_log_uniform(rng, 0.05, 0.5), V1=_log_uniform(rng, 3, 60))
            t = _jitter(rng, [0.1, 0.25, 0.5, 1, 2, 4, 6, 8, 12, 24, 36])
            doses = [Dose(0, 100, "iv")]
    elif name == "two-comp-oral":
        if hard:
            while True:
                th = _far(rng, m, ["ka", "k10", "k12", "k21", "V1"], 2, 8)
                if th["ka"] > 3 * (th["k10"] + th["k12"] + th["k21"]):
                    break
            t = _jitter(rng, [0.5, 1, 2, 4, 6, 8, 12, 24, 48], 0.3)
            doses = [Dose(0, 100, "oral"), Dose(12, 100, "oral"), Dose(24, 100, "oral")]
        else:
            th = dict(ka=_log_uniform(rng, 1, 6), k10=_log_uniform(rng, 0.05, 0.5), k12=_log_uniform(rng, 0.2, 1.5),
                      k21=_log_uniform(rng, 0.05, 0.4), V1=_log_uniform(rng, 3, 60))
            t = _jitter(rng, [0.25, 0.5, 1, 1.5, 2, 3, 4, 6, 8, 12, 24, 36])
            doses = [Dose(0, 100, "oral")]
    elif name == "one-comp-mm":
        V = _log_uniform(rng, 5, 200) if hard else _log_uniform(rng, 10, 80)
        Km = _log_uniform(rng, 0.3, 50) if hard else _log_uniform(rng, 1, 20)
        c0 = _log_uniform(rng, 3, 10) * Km
        th = dict(Vmax=_log_uniform(rng, 0.3, 1.5) * Km * V * 0.3, Km=Km, V=V)
        doses = [Dose(0, c0 * V, "iv")]
        grid = np.linspace(0.01, 400, 4000)
        c = m.simulate(th, doses, grid).observable()
        t_end = float(grid[np.argmax(c < 0.2 * Km)]) if np.any(c < 0.2 * Km) else 400.0
        frac = [0.03, 0.1, 0.25, 0.45, 0.7, 1.0] if hard else [0.02, 0.06, 0.12, 0.2, 0.3, 0.4, 0.55, 0.7, 0.85, 1.0]
        t = _jitter(rng, t_end * np.array(frac), 0.2 if hard else 0.1)
    elif name == "predator-prey":
        hi = 3 if hard else 1.5
        a, g = _log_uniform(rng, 1 / hi, hi), _log_uniform(rng, 1 / hi, hi)
        b = _log_uniform(rng, 0.005, 0.5) if hard else _log_uniform(rng, 0.02, 0.1)
        d = _log_uniform(rng, 0.005, 0.5) if hard else _log_uniform(rng, 0.02, 0.1)
        th = dict(alpha=a, beta=b, gamma=g, delta=d, prey0=g / d * _log_uniform(rng, 1.5, 3),
                  predator0=a / b * _log_uniform(rng, 0.3, 0.8))
        span = 3 * 2 * np.pi / np.sqrt(a * g) if hard else 20.0
        t = np.sort(rng.uniform(0, span, 18 if hard else 25))
        doses = []
        obs = np.zeros(t.size, dtype=np.int64)  # prey only
    elif name == "sir":
        g = _log_uniform(rng, 0.05, 1) if hard else _log_uniform(rng, 0.1, 0.4)
        th = dict(beta=g * (_log_uniform(rng, 1.5, 6) if hard else _log_uniform(rng, 1.8, 4)), gamma=g,
                  I0=_log_uniform(rng, 0.5, 50) if hard else _log_uniform(rng, 1, 20))
        doses = []
        grid = np.linspace(0, 2000, 8001)
        peak = float(grid[np.argmax(m.simulate(th, doses, grid).observable())])
        t = np.sort(rng.uniform(0.05, 1, 9 if hard else 14)) * peak * (2.0 if hard else 2.2)
    else:
        raise KeyError(name)
    theta = m.param_vector(th)
    n = t.size
    oi = np.zeros(n, dtype=np.int64) if obs is None else obs
    y = m.simulate(theta, doses, t).observables[np.arange(n), oi]
    y = y * np.exp(noise * rng.standard_normal(n))
    data = SubjectData(f"{name}-{k}", t, y, oi, np.zeros(n, bool), np.full(n, np.nan), tuple(doses))
    free = tuple(i for i, p in enumerate(m.template.parameters) if not p.fixed)
    return Problem(m, (data,), free, m.defaults.copy(), "proportional"), theta


def _identifiable(problem, theta_free: np.ndarray) -> np.ndarray:
    """Parameters compared with the truth (β·predator0 for prey-only predator–prey)."""
    names = list(problem.names)
    if {"beta", "predator0"} <= set(names) and set(problem.obs_index.tolist()) == {0}:
        ib, ip = names.index("beta"), names.index("predator0")
        keep = [i for i in range(len(names)) if i not in (ib, ip)]
        return np.r_[theta_free[keep], theta_free[ib] * theta_free[ip]]
    return theta_free


def _within(problem, a: np.ndarray, b: np.ndarray, factor: float = 1.5) -> bool:
    ra = _identifiable(problem, a) / _identifiable(problem, b)
    return bool(np.all(np.abs(np.log(ra)) < np.log(factor)))


def run_benchmark(per_template: int, hard: bool, templates=TEMPLATES) -> list[dict]:
    from compartments.estimate.nls import LikelihoodStage
    from compartments.estimate.pinn import NetworkStage

    lik = LikelihoodStage()
    rows = []
    for name in templates:
        rec = dict(template=name, wall=[], cpu=[], truth=0, opt=0, opt_truth=0, basin=0, basin_default=0,
                   failed=0, n=0)
        for k in range(per_template):
            problem, theta = make_problem(name, k, hard)
            truth = theta[list(problem.free)]
            c0 = time.process_time()
            res = NetworkStage(seed=0).run(problem, [problem.default_phi])
            rec["cpu"].append(time.process_time() - c0)
            rec["wall"].append(res.wall_time)
            rec["failed"] += res.status == "failed"
            fits = [lik.run(problem, [s]) for s in (res.phi, problem.to_phi(truth), problem.default_phi)]
            objs = [float(f.objective) if f.objective is not None else np.inf for f in fits]
            best = int(np.argmin(objs))
            tol = 1e-3 * abs(objs[best]) + 1e-2
            opt = problem.to_theta_free(fits[best].phi)
            est = problem.to_theta_free(res.phi)
            rec["truth"] += _within(problem, est, truth)
            rec["opt"] += _within(problem, est, opt)
            rec["opt_truth"] += _within(problem, opt, truth)
            rec["basin"] += objs[0] <= objs[best] + tol
            rec["basin_default"] += objs[2] <= objs[best] + tol
            rec["n"] += 1
        rows.append(rec)
        _print_row(rec, header=len(rows) == 1)
    return rows


def _print_row(rec: dict, header: bool) -> None:
    if header:
        print(f"{'template':14s} {'n':>3s} {'wall med':>9s} {'wall p90':>9s} {'cpu med':>8s} {'truth×1.5':>10s} "
              f"{'opt×1.5':>8s} {'opt in truth×1.5':>17s} {'basin':>6s} {'basin(defaults)':>16s}")
    n = rec["n"]
    w, c = np.array(rec["wall"]), np.array(rec["cpu"])
    print(f"{rec['template']:14s} {n:3d} {np.median(w):8.3f}s {np.quantile(w, 0.9):8.3f}s {np.median(c):7.3f}s "
          f"{rec['truth'] / n:10.2f} {rec['opt'] / n:8.2f} {rec['opt_truth'] / n:17.2f} {rec['basin'] / n:6.2f} "
          f"{rec['basin_default'] / n:16.2f}", flush=True)


# -- the gradient-trained alternative (design comparison only) -----------------------------
def trained_network(problem, seed: int = 0, adam_steps: int = 500, lbfgs_steps: int = 300,
                    width: int = 32, physics_weight: float = 3.0):
    """Fit a single-dose, one-subject problem with a gradient-trained network (torch).

    A 2×``width`` tanh network of the log-warped time outputs the scaled states through a
    softplus; the parameters are ``lo + (hi − lo)·sigmoid(ψ)`` on the working scale,
    started at the template defaults. Loss: relative data misfit + λ² mean squared ODE
    residual at 64 collocation points (log-spaced) + initial-condition penalty. Adam
    warm-up, then full-batch L-BFGS. Returns (phi, wall seconds).
    """
    import torch

    from compartments.estimate.pinn import _finite_box

    torch.set_num_threads(1)
    gen = torch.Generator().manual_seed(seed)
    m = problem.model
    d = problem.data[0]
    dt = torch.float64
    t_obs = torch.tensor(d.times, dtype=dt)
    y_obs = torch.tensor(d.values, dtype=dt)
    t_end = float(d.times.max())
    c = 0.5 * float(d.times[d.times > 0].min())
    warp = lambda t: torch.log1p(t / c) / np.log1p(t_end / c)  # noqa: E731
    t_col = torch.tensor(c * np.expm1(np.linspace(0, 1, 64) * np.log1p(t_end / c)), dtype=dt, requires_grad=True)
    dose = d.doses[0]
    route = m.routes[dose.route]
    x_start = np.zeros(m.n_states)
    x_start[route.state_index] = dose.amount
    scale = float(dose.amount)
    lo, hi = _finite_box(problem)
    lo_t, hi_t = torch.tensor(lo, dtype=dt), torch.tensor(hi, dtype=dt)
    p0 = (problem.default_phi - lo) / (hi - lo)
    psi = torch.tensor(np.log(p0 / (1 - p0)), dtype=dt, requires_grad=True)
    net = torch.nn.Sequential(torch.nn.Linear(1, width), torch.nn.Tanh(), torch.nn.Linear(width, width),
                              torch.nn.Tanh(), torch.nn.Linear(width, m.n_states)).to(dt)
    with torch.no_grad():
        for layer in net:
            if isinstance(layer, torch.nn.Linear):
                layer.weight.copy_(torch.randn(layer.weight.shape, generator=gen, dtype=dt) / np.sqrt(layer.in_features))
                layer.bias.zero_()
    sp = torch.nn.functional.softplus
    free = list(problem.free)
    base = torch.tensor(problem.base, dtype=dt)
    logm = torch.tensor(problem.log_mask)

    def theta_of(psi_):
        phi = lo_t + (hi_t - lo_t) * torch.sigmoid(psi_)
        th = base.clone()
        th[free] = torch.where(logm, torch.exp(phi), phi)
        return th

    def states(t):
        return scale * sp(net(warp(t).unsqueeze(1)))

    def loss_fn():
        th = theta_of(psi)
        x = states(t_col)
        dx = torch.stack([torch.autograd.grad(x[:, i].sum(), t_col, create_graph=True)[0]
                          for i in range(m.n_states)], dim=1)
        A = _torch_matrix(m, th)
        f = x @ A.T
        res = (dx - f) / scale * t_end
        x0 = states(torch.zeros(1, dtype=dt))[0]
        ic = (x0 - torch.tensor(x_start, dtype=dt)) / scale
        xo = states(t_obs)
        yhat = _torch_observe(m, xo, th)
        data = ((yhat - y_obs) / y_obs).pow(2).sum()
        return data + physics_weight**2 * res.pow(2).mean() * len(d.times) + 100.0 * ic.pow(2).sum()

    params = list(net.parameters()) + [psi]
    t0 = time.perf_counter()
    opt = torch.optim.Adam(params, lr=1e-2)
    for _ in range(adam_steps):
        opt.zero_grad()
        loss = loss_fn()
        loss.backward()
        opt.step()
    lb = torch.optim.LBFGS(params, max_iter=lbfgs_steps, line_search_fn="strong_wolfe", tolerance_change=1e-12)

    def closure():
        lb.zero_grad()
        loss = loss_fn()
        loss.backward()
        return loss

    lb.step(closure)
    wall = time.perf_counter() - t0
    phi = (lo_t + (hi_t - lo_t) * torch.sigmoid(psi)).detach().numpy()
    return phi, wall


def _torch_matrix(model, theta):
    """A(θ) of a linear template as a differentiable torch expression (via sympy)."""
    import sympy as sp
    import torch

    key = ("A", id(model))
    fn = _TORCH_CACHE.get(key)
    if fn is None:
        xs = [sp.Symbol(n, real=True) for n in model.state_names]
        ps = [sp.Symbol(n, real=True) for n in model.parameter_names]
        by = {s.name: s for s in xs + ps}
        f = [model.template.equations[n] for n in model.state_names]
        f = [e.xreplace({q: by[q.name] for q in e.free_symbols if q.name in by}) for e in f]
        A = [[sp.diff(fi, x) for x in xs] for fi in f]
        fn = sp.lambdify(ps, A, modules=[{"exp": torch.exp, "log": torch.log}, "math"])
        _TORCH_CACHE[key] = fn
    rows = fn(*theta)
    return torch.stack([torch.stack([torch.as_tensor(v, dtype=torch.float64) * torch.ones((), dtype=torch.float64)
                                     for v in row]) for row in rows])


def _torch_observe(model, x, theta):
    """The first observable (affine in the states) as a torch expression."""
    import sympy as sp
    import torch

    key = ("g", id(model))
    fn = _TORCH_CACHE.get(key)
    if fn is None:
        xs = [sp.Symbol(n, real=True) for n in model.state_names]
        ps = [sp.Symbol(n, real=True) for n in model.parameter_names]
        by = {s.name: s for s in xs + ps}
        e = model.template.observables[0].expression
        e = e.xreplace({q: by[q.name] for q in e.free_symbols if q.name in by})
        fn = sp.lambdify(xs + ps, e, modules=[{"exp": torch.exp, "log": torch.log}, "math"])
        _TORCH_CACHE[key] = fn
    return fn(*[x[:, i] for i in range(x.shape[1])], *theta)


_TORCH_CACHE: dict = {}


def compare_trained(n: int) -> None:
    from compartments.estimate.nls import LikelihoodStage
    from compartments.estimate.pinn import NetworkStage

    lik = LikelihoodStage()
    print("\none-comp-oral: gradient-trained network vs fixed hidden layer (profiled loss)")
    for k in range(n):
        problem, theta = make_problem("one-comp-oral", k)
        truth = theta[list(problem.free)]
        opt = problem.to_theta_free(lik.run(problem, [problem.to_phi(truth), problem.default_phi]).phi)
        phi_t, wall_t = trained_network(problem, seed=0)
        res = NetworkStage(seed=0).run(problem, [problem.default_phi])
        print(f"  problem {k}: trained {wall_t:6.2f}s est/opt {np.round(problem.to_theta_free(phi_t) / opt, 2)}"
              f" | fixed layer {res.wall_time:5.2f}s est/opt {np.round(problem.to_theta_free(res.phi) / opt, 2)}",
              flush=True)


ABLATIONS = {
    "default": {},
    "lambda=1": {"physics_weight": 1.0},
    "lambda=10": {"physics_weight": 10.0},
    "continuation flipped": "flip",
    "no polish": {"polish": 0},
    "features=12": {"features": 12},
    "screen=0": {"screen": 0},
    "n_starts=2": {"n_starts": 2},
}


def ablation(per_template: int, templates, hard: bool = False) -> None:
    """The stage with one setting changed at a time: closeness to the optimum, basin, time."""
    from compartments.estimate.collocation import Collocation
    from compartments.estimate.nls import LikelihoodStage
    from compartments.estimate.pinn import NetworkStage

    lik = LikelihoodStage()
    print(f"\n{'template':14s} {'variant':22s} {'opt×1.5':>8s} {'basin':>6s} {'cpu med':>8s}")
    for name in templates:
        cases = []
        for k in range(per_template):
            problem, theta = make_problem(name, k, hard)
            truth = theta[list(problem.free)]
            ref = lik.run(problem, [problem.to_phi(truth), problem.default_phi])
            cases.append((problem, ref))
        linear = Collocation(cases[0][0]).linear
        for label, variant in ABLATIONS.items():
            if variant == "flip":
                variant = {"continuation": (0.3,)} if linear else {"continuation": ()}
            close = basin = 0
            cpu = []
            for problem, ref in cases:
                c0 = time.process_time()
                res = NetworkStage(seed=0, **variant).run(problem, [problem.default_phi])
                cpu.append(time.process_time() - c0)
                obj = float(lik.run(problem, [res.phi]).objective)
                best = min(obj, float(ref.objective))
                basin += obj <= best + 1e-3 * abs(best) + 1e-2
                close += _within(problem, problem.to_theta_free(res.phi), problem.to_theta_free(ref.phi))
            n = len(cases)
            print(f"{name:14s} {label:22s} {close / n:8.2f} {basin / n:6.2f} {np.median(cpu):7.3f}s", flush=True)


def representation(per_template: int) -> None:
    """Profiled loss at the likelihood optimum (0 = exact representation) for devices off."""
    import compartments.estimate.collocation as col_mod
    from compartments.estimate.collocation import Collocation
    from compartments.estimate.nls import LikelihoodStage
    from compartments.estimate.pinn import exact_misfit

    lik = LikelihoodStage()
    original_warp = col_mod.choose_warp
    print(f"\n{'template':14s} {'device':22s} {'median':>9s} {'worst':>9s}  (exact misfit median)")
    for name in ("one-comp-oral", "two-comp-iv", "predator-prey", "sir"):
        cases = []
        for k in range(per_template):
            problem, theta = make_problem(name, k)
            ref = lik.run(problem, [problem.to_phi(theta[list(problem.free)]), problem.default_phi])
            cases.append((problem, ref.phi))
        exact = np.median([exact_misfit(p, phi) for p, phi in cases])
        for label in ("all devices", "linear clock", "states as amounts"):
            losses = []
            for problem, phi in cases:
                col_mod.choose_warp = (lambda *a: np.inf) if label == "linear clock" else original_warp
                col = Collocation(problem)
                if label == "states as amounts":
                    for sub in col.subjects:
                        sub.log_state = np.zeros_like(sub.log_state)
                losses.append(col.profile(phi)[0])
            col_mod.choose_warp = original_warp
            print(f"{name:14s} {label:22s} {np.median(losses):9.3g} {np.max(losses):9.3g}  ({exact:.3g})", flush=True)


def _best_of(fn, repeat: int = 7, number: int = 50) -> float:
    """Least mean time of ``fn`` (s) over ``repeat`` rounds of ``number`` calls."""
    fn()
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        for _ in range(number):
            fn()
        best = min(best, (time.perf_counter() - t0) / number)
    return best


def _core_numpy(Jz, r, Jt):
    """Inner step and projected θ-Jacobian, as in ``Collocation.solve`` (NumPy/SciPy)."""
    from scipy.linalg import cho_factor, cho_solve

    fac = cho_factor(Jz.T @ Jz, check_finite=False)
    step = cho_solve(fac, Jz.T @ r, check_finite=False)
    proj = cho_solve(fac, Jz.T @ Jt, check_finite=False)
    return step, Jt - Jz @ proj


def _core_torch(Jz, r, Jt):
    """The same in torch."""
    import torch

    L = torch.linalg.cholesky(Jz.T @ Jz)
    step = torch.cholesky_solve((Jz.T @ r)[:, None], L)
    proj = torch.cholesky_solve(Jz.T @ Jt, L)
    return step, Jt - Jz @ proj


def _elementwise(a, b, c, d):
    """One line of the residual assembly's shape (``pw * (D − dtds·rate/div)``)."""
    return a * (b - 0.5 * c / d)


def compare_backend(per_template: int, templates=TEMPLATES) -> None:
    """The stage's linear-algebra core in NumPy/SciPy and in torch, same matrices, one thread."""
    import torch

    from compartments.estimate.collocation import Collocation

    torch.set_num_threads(1)
    print(f"{'template':14s} {'Jz shape':>10s} {'numpy µs':>9s} {'torch µs':>9s} {'torch/numpy':>12s} "
          f"{'profile µs':>11s} {'core share':>11s} {'elem np':>8s} {'elem pt':>8s} {'ratio':>8s}")
    for name in templates:
        rows = []
        for k in range(per_template):
            problem, theta_full = make_problem(name, k)
            col = Collocation(problem)
            phi = problem.to_phi(theta_full[list(problem.free)])
            sub = col.subjects[0]
            lam = col.settings.physics_weight
            lay = sub.layout(theta_full)
            ctx = sub.context(theta_full, lay, True, lam)
            z = sub.solve(theta_full, None, True, lam)[2]
            r, Jz, _ = sub.residual(z, ctx, lay, True, False)
            Jt = sub.residual(z, ctx, lay, False, True)[2]

            core_numpy = partial(_core_numpy, Jz, r, Jt)
            core_torch = partial(_core_torch, *(torch.from_numpy(np.ascontiguousarray(a)) for a in (Jz, r, Jt)))
            a, b = core_numpy(), core_torch()
            assert np.allclose(a[1], b[1].numpy(), rtol=1e-6, atol=1e-8 * np.abs(a[1]).max())
            t_np, t_torch = _best_of(core_numpy), _best_of(core_torch)
            t_prof = _best_of(partial(col.profile, phi, jacobian=True), number=10)
            # one elementwise line of the residual assembly (physics rows), on arrays of its size
            e = [np.ascontiguousarray(r[: Jz.shape[0] // 2]) + i for i in range(4)]
            t_el = _best_of(partial(_elementwise, *e), number=200)
            t_el_torch = _best_of(partial(_elementwise, *(torch.from_numpy(x) for x in e)), number=200)
            rows.append((Jz.shape, t_np, t_torch, t_prof, t_el, t_el_torch))
        shape = max(r[0] for r in rows)
        t_np, t_torch, t_prof, t_el, t_el_torch = (np.median([r[i] for r in rows]) for i in (1, 2, 3, 4, 5))
        print(f"{name:14s} {f'{shape[0]}×{shape[1]}':>10s} {1e6 * t_np:9.1f} {1e6 * t_torch:9.1f} "
              f"{t_torch / t_np:11.2f}× {1e6 * t_prof:11.1f} {t_np / t_prof:10.0%} "
              f"{1e6 * t_el:8.2f} {1e6 * t_el_torch:8.2f} {t_el_torch / t_el:7.2f}×", flush=True)


def positivity(per_template: int, templates=TEMPLATES) -> None:
    """Lowest value of the amount states along the stage's trajectory, relative to their peak.

    Amount states are linear in the output weights (not positive by construction); this
    reports how far below zero the fitted trajectories dip, at the stage's returned point,
    on 400 points per piece.
    """
    from compartments.estimate.collocation import Collocation, _chebyshev_features
    from compartments.estimate.pinn import NetworkStage

    print(f"{'template':22s} {'median min/max':>15s} {'worst min/max':>14s} {'below −1 %':>11s}")
    for hard in (False, True):
        for name in templates:
            ratios = []
            for k in range(per_template):
                problem, _ = make_problem(name, k, hard)
                res = NetworkStage(seed=0).run(problem, [problem.default_phi])
                col = Collocation(problem)
                sub = col.subjects[0]
                theta = problem.full_theta(res.phi)
                z = sub.solve(theta, None, False, col.settings.physics_weight)[2]
                amounts = ~sub.log_state
                if not amounts.any():
                    continue
                lay = sub.layout(theta)
                basis, _ = _chebyshev_features(np.linspace(-1.0, 1.0, 400), col.M)
                X = np.einsum("qim,km->iqk", z.reshape(lay.n_pieces, col.n, col.M), basis)[amounts]
                ratios.append(float(X.min() / max(X.max(), 1e-300)))
            label = name + (" (hard)" if hard else "")
            if not ratios:
                print(f"{label:22s} {'no amount states':>15s}")
                continue
            r = np.array(ratios)
            print(f"{label:22s} {np.median(r):15.2g} {r.min():14.2g} {np.sum(r < -0.01):7d}/{r.size}", flush=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--per-template", type=int, default=10)
    ap.add_argument("--hard", action="store_true")
    ap.add_argument("--templates", default=",".join(TEMPLATES))
    ap.add_argument("--compare-trained", type=int, default=0, metavar="N")
    ap.add_argument("--ablation", type=int, default=0, metavar="N", help="one-setting-off runs, N problems each")
    ap.add_argument("--representation", type=int, default=0, metavar="N",
                    help="profiled loss at the optimum with devices off, N problems each")
    ap.add_argument("--compare-backend", type=int, default=0, metavar="N",
                    help="linear-algebra core in NumPy vs torch, N problems per template")
    ap.add_argument("--positivity", type=int, default=0, metavar="N",
                    help="how far the amount-state trajectories dip below zero, N problems per template")
    args = ap.parse_args()
    warnings.filterwarnings("ignore")
    if args.per_template > 0:
        run_benchmark(args.per_template, args.hard, tuple(args.templates.split(",")))
    if args.compare_trained:
        compare_trained(args.compare_trained)
    if args.ablation:
        ablation(args.ablation, tuple(args.templates.split(",")), args.hard)
    if args.representation:
        representation(args.representation)
    if args.positivity:
        positivity(args.positivity, tuple(args.templates.split(",")))
    if args.compare_backend:
        compare_backend(args.compare_backend, tuple(args.templates.split(",")))


if __name__ == "__main__":
    main()
