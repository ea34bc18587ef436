"""Before-the-study tools: identifiability time per shipped template, and the design search's
spline objective against exact simulation (speed and agreement, side by side).

Run: ``.venv/bin/python benchmarks/design.py`` (a few minutes on 2 cores). Goals:

* structural identifiability of every shipped template (all outputs observed, every dose
  route) decided within the 10 s bound;
* the spline objective at least 20× faster per schedule than exact simulation, with
  criterion values within 1e-6 (relative) of the exact ones on the better half of random
  schedules (near-singular schedules amplify any difference and do not matter to the search).
"""

from __future__ import annotations

import statistics
import time

import numpy as np

from compartments import design_samples, identifiability, load_template
from compartments.library import list_templates


def identifiability_times(repeats: int = 3) -> None:
    print("structural identifiability, default outputs and routes (median of", repeats, "runs)")
    print(f"{'template':20s} {'observed':14s} {'seconds':>8s}  answer")
    cases = [(t.name, None) for t in list_templates()] + [("predator-prey", ["prey"])]
    worst = 0.0
    for name, observed in cases:
        t = load_template(name)
        times, r = [], None
        for _ in range(repeats):
            start = time.perf_counter()
            r = identifiability(t, observed, timeout=60)
            times.append(time.perf_counter() - start)
        assert r is not None
        med = statistics.median(times)
        worst = max(worst, med)
        counts = {s: sum(v == s for v in r.status.values()) for s in ("global", "local", "none", "undecided")}
        answer = ", ".join(f"{v} {k}" for k, v in counts.items() if v)
        print(f"{name:20s} {str(observed or 'all'):14s} {med:8.2f}  {answer}")
    print(f"slowest: {worst:.2f} s (goal: under the 10 s bound)")


def spline_against_exact(schedules: int = 400) -> None:
    print("\ndesign objective: splines on a dense grid vs exact simulation per schedule")
    cases = [("one-comp-oral", {"ka": 0.7, "ke": 0.2, "V": 10}, 3, (0, 24)),
             ("two-comp-iv", {}, 4, (0, 24)),
             ("predator-prey", {}, 6, (0, 20))]
    for name, values, n, window in cases:
        d = design_samples(load_template(name), values, n=n, window=window)
        problem = d._problem
        rng = np.random.default_rng(0)
        lo, hi = problem.window
        X = np.sort(rng.uniform(lo, hi, size=(schedules, n)), axis=1)
        start = time.perf_counter()
        fast = problem.objective(X)
        t_spline = (time.perf_counter() - start) / schedules
        start = time.perf_counter()
        exact = np.array([problem.exact_value(x) for x in X])
        t_exact = (time.perf_counter() - start) / schedules
        ok = np.isfinite(exact) & np.isfinite(fast)
        ok &= exact >= np.median(exact[ok])  # the better half: near-singular schedules amplify any error
        rel = np.max(np.abs(fast[ok] - exact[ok]) / np.maximum(1.0, np.abs(exact[ok])))
        print(f"{name:14s} n={n}: spline {1e3 * t_spline:7.3f} ms, exact {1e3 * t_exact:7.3f} ms per schedule, "
              f"ratio {t_exact / t_spline:6.1f}×, max diff of log det (better half) {rel:.1e} "
              f"({int(np.sum(np.isfinite(exact) != np.isfinite(fast)))} singular in one only); "
              f"design took {d.seconds:.1f} s")


if __name__ == "__main__":
    identifiability_times()
    spline_against_exact()
