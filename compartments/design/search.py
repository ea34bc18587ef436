"""Searching sampling schedules: continuous times in a window, or a list of allowed times.

A schedule is a flat vector of times, one block per group of subjects (``layout`` gives
the number of samples of each block); within a block the times are sorted and at least
``spacing`` apart. The objective takes a batch of schedules (S, N) and returns the values
to maximise (S,).

* Continuous: differential evolution (Storn & Price 1997, J Glob Optim 11:341; scipy),
  vectorised over its population, then sequential quadratic programming (SLSQP) from
  its best point and from ``starts`` further Latin-hypercube points, with the spacing as
  linear constraints. How many of the polished starts reached the best value is kept as
  a sign of how clear the optimum is.
* Allowed times: every combination when there are at most ``MAX_ENUMERATED`` of them,
  otherwise coordinate exchange (Meyer & Nachtsheim 1995, Technometrics 37:60) from
  ``starts`` random schedules.

Deterministic for a given seed. Numerics only: no I/O and no presentation.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import differential_evolution, minimize
from scipy.stats import qmc

Array = NDArray[np.float64]
Objective = Callable[[Array], Array]

__all__ = ["SearchResult", "blocks", "continuous_search", "discrete_search", "repair"]

#: Most combinations of allowed times evaluated one by one.
MAX_ENUMERATED = 20_000
#: Values within this relative distance of the best count as reaching it.
AGREEMENT = 1e-6
_FLOOR = -1e6  # stands for a singular design in the smooth local search


@dataclass(frozen=True)
class SearchResult:
    """The best schedule found and how the starts agreed.

    Attributes
    ----------
    x : (N,) array
    value : float
    starts : int
        Starts polished (continuous) or schedules tried (allowed times).
    agreeing : int
        Starts that reached the best value (within ``AGREEMENT``).
    method : str
    """

    x: Array
    value: float
    starts: int
    agreeing: int
    method: str


def blocks(layout: Sequence[int]) -> list[slice]:
    """The slice of each group's times in a flat schedule."""
    out, k = [], 0
    for n in layout:
        out.append(slice(k, k + n))
        k += n
    return out


def repair(X: Array, layout: Sequence[int], lo: float, hi: float, spacing: float) -> Array:
    """Sort each block and push its times apart to ``spacing`` inside [lo, hi].

    >>> repair(np.array([[5.0, 1.0, 1.2]]), [3], 0.0, 10.0, 1.0).tolist()
    [[1.0, 2.0, 5.0]]
    """
    X = np.array(X, dtype=float, copy=True)
    for b in blocks(layout):
        block = np.sort(np.clip(X[..., b], lo, hi), axis=-1)
        if spacing > 0:
            n = block.shape[-1]
            for i in range(1, n):
                block[..., i] = np.maximum(block[..., i], block[..., i - 1] + spacing)
            block[..., n - 1] = np.minimum(block[..., n - 1], hi)
            for i in range(n - 2, -1, -1):
                block[..., i] = np.minimum(block[..., i], block[..., i + 1] - spacing)
        X[..., b] = block
    return X


def _constraints(layout: Sequence[int], spacing: float) -> list[dict]:
    rows = []
    N = sum(layout)
    for b in blocks(layout):
        for i in range(b.start, b.stop - 1):
            row = np.zeros(N)
            row[i], row[i + 1] = -1.0, 1.0
            rows.append(row)
    if not rows:
        return []
    A = np.array(rows)
    return [{"type": "ineq", "fun": lambda x: A @ x - spacing, "jac": lambda x: A}]


def continuous_search(objective: Objective, layout: Sequence[int], lo: float, hi: float, spacing: float,
                      starts: int, seed: int) -> SearchResult:
    """Best schedule in [lo, hi] (see the module docstring)."""
    N = sum(layout)

    def batch(X: Array) -> Array:
        return objective(repair(X, layout, lo, hi, spacing))

    def de_cost(x: Array) -> Array:  # scipy's vectorised form: x is (N, S)
        v = batch(np.atleast_2d(x.T))
        return np.where(np.isfinite(v), -v, -_FLOOR)

    de = differential_evolution(de_cost, [(lo, hi)] * N, seed=seed, vectorized=True, updating="deferred",
                                popsize=max(15, 4 * N), maxiter=300, tol=1e-10, polish=False,
                                init="latinhypercube")
    sampler = qmc.LatinHypercube(d=N, seed=np.random.default_rng(seed))
    points = [de.x] + list(lo + (hi - lo) * sampler.random(starts))
    cons = _constraints(layout, spacing)
    eps = 1e-7 * (hi - lo)

    def cost(x: Array) -> float:
        v = float(objective(np.clip(x, lo, hi)[None, :])[0])
        return -v if np.isfinite(v) else -_FLOOR

    results = []
    for p in points:
        x0 = repair(np.asarray(p, dtype=float)[None, :], layout, lo, hi, spacing)[0]
        r = minimize(cost, x0, method="SLSQP", bounds=[(lo, hi)] * N, constraints=cons,
                     options={"maxiter": 200, "ftol": 1e-13, "eps": eps})
        x = repair(np.clip(r.x, lo, hi)[None, :], layout, lo, hi, spacing)[0]
        results.append((float(objective(x[None, :])[0]), x))
    return _best(results, "differential evolution, then SLSQP from each start")


def _best(results: list[tuple[float, Array]], method: str) -> SearchResult:
    values = np.array([v for v, _ in results])
    finite = np.isfinite(values)
    if not finite.any():
        return SearchResult(results[0][1], -math.inf, len(results), 0, method)
    i = int(np.argmax(np.where(finite, values, -np.inf)))
    best = values[i]
    agreeing = int(np.sum(finite & (values >= best - AGREEMENT * max(1.0, abs(best)))))
    return SearchResult(results[i][1], float(best), len(results), agreeing, method)


def _feasible(block: Sequence[float], spacing: float) -> bool:
    return all(b - a >= spacing - 1e-12 for a, b in itertools.pairwise(sorted(block)))


def discrete_search(objective: Objective, layout: Sequence[int], candidates: Array, spacing: float,
                    starts: int, seed: int) -> SearchResult:
    """Best schedule drawn from the allowed ``candidates`` (distinct within a block)."""
    C = np.sort(np.asarray(candidates, dtype=float))
    if len(layout) == 1 and math.comb(len(C), layout[0]) <= MAX_ENUMERATED:
        combos = np.array([c for c in itertools.combinations(C, layout[0]) if _feasible(c, spacing)])
        values = np.concatenate([objective(combos[i:i + 2000]) for i in range(0, len(combos), 2000)])
        finite = np.isfinite(values)
        i = int(np.argmax(np.where(finite, values, -np.inf)))
        best = values[i]
        agreeing = int(np.sum(finite & (values >= best - AGREEMENT * max(1.0, abs(best)))))
        return SearchResult(combos[i], float(best), len(combos), agreeing, "every combination of the allowed times")
    rng = np.random.default_rng(seed)
    results = [_exchange(objective, layout, C, spacing, rng) for _ in range(max(1, starts))]
    return _best(results, "coordinate exchange over the allowed times")


def _random_schedule(layout: Sequence[int], C: Array, spacing: float, rng: np.random.Generator) -> Array:
    out = []
    for n in layout:
        for _ in range(1000):
            pick = np.sort(rng.choice(C, size=n, replace=False))
            if _feasible(pick, spacing):
                break
        out.append(pick)
    return np.concatenate(out)


def _exchange(objective: Objective, layout: Sequence[int], C: Array, spacing: float,
              rng: np.random.Generator) -> tuple[float, Array]:
    x = _random_schedule(layout, C, spacing, rng)
    current = float(objective(x[None, :])[0])
    parts = blocks(layout)
    for _ in range(100):
        improved = False
        for b in parts:
            for k in range(b.start, b.stop):
                trials = np.repeat(x[None, :], len(C), axis=0)
                trials[:, k] = C
                ok = np.array([len(set(t[b])) == b.stop - b.start and _feasible(t[b], spacing) for t in trials])
                if not ok.any():
                    continue
                values = np.full(len(C), -np.inf)
                values[ok] = objective(trials[ok])
                j = int(np.argmax(values))
                if values[j] > current + 1e-12 * max(1.0, abs(current)):
                    x, current, improved = trials[j], float(values[j]), True
        if not improved:
            break
    for b in parts:
        x[b] = np.sort(x[b])
    return current, x
