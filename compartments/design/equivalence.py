"""Checking a design by the general equivalence theorem (Kiefer & Wolfowitz 1960).

A design ξ, with its information normalised per elementary design (per measurement for one
subject, per subject for a population), is optimal among all designs — any number of
distinct times with any weights — exactly when its sensitivity function ``d(x, ξ)``
stays at or below the criterion's bound over the whole design space, with equality at
the design's own points (:mod:`compartments.design.criteria`). The elementary designs are
single sampling times for one subject, and whole schedules of n samples for a population
(first-order information is additive over subjects, not over one subject's samples).

The maximum of ``d`` is found on the dense grid (one subject) or by a search over
schedules (population), and the design's own points are added exactly. When the maximum
exceeds the bound — a design with unequal weights, or with more distinct times, would do
better — the efficiency bound says how much better it could be at most.

Numerics only: no I/O and no presentation.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .criteria import DOptimal
from .curves import exact_outputs
from .fisher import sample_information
from .population_design import population_information
from .problem import DesignProblem
from .search import continuous_search, discrete_search

Array = NDArray[np.float64]

__all__ = ["EquivalenceCheck", "check_equivalence"]

#: Relative tolerance of "at or below the bound".
TOLERANCE = 1e-3


@dataclass(frozen=True)
class EquivalenceCheck:
    """The equivalence-theorem check of a design.

    Attributes
    ----------
    bound : float
        The bound of the sensitivity function at an optimum (the number of parameters for
        D-optimality).
    maximum : float
        The largest value of the sensitivity function over the design space.
    at : tuple of float
        Where it is reached (a time, or a schedule for a population design).
    efficiency_bound : float
        The design is at least this efficient relative to the best design of any weights.
    holds : bool
        ``maximum <= bound·(1 + TOLERANCE)``: the design is optimal among all designs.
    free_weights : float or None
        D-optimality for one subject without a prior: the design's efficiency relative to
        the best design with free weights on the grid, found by the multiplicative
        algorithm (Silvey, Titterington & Torsney 1978, Commun Stat A 7:1379); None
        otherwise. With n samples on fewer support points than n the weights cannot all
        be equal, so this can be below 1 for the best n-sample schedule.
    """

    bound: float
    maximum: float
    at: tuple[float, ...]
    efficiency_bound: float
    holds: bool
    free_weights: float | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"bound": self.bound, "maximum": self.maximum, "at": list(self.at),
                "efficiency_bound": self.efficiency_bound, "holds": self.holds,
                "free_weights": self.free_weights}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> EquivalenceCheck:
        fw = d.get("free_weights")
        return cls(float(d["bound"]), float(d["maximum"]), tuple(d["at"]), float(d["efficiency_bound"]),
                   bool(d["holds"]), None if fw is None else float(fw))


def _normalised(problem: DesignProblem, x: Array) -> Array:
    return problem.exact_information(x) / problem.total_weight()


def _finish(problem: DesignProblem, bound: float, maximum: float, at: Sequence[float]) -> EquivalenceCheck:
    crit = problem.criterion
    return EquivalenceCheck(bound=bound, maximum=float(maximum), at=tuple(float(a) for a in at),
                            efficiency_bound=crit.efficiency_bound(float(maximum), bound),
                            holds=bool(maximum <= bound * (1 + TOLERANCE)))


def check_equivalence(problem: DesignProblem, x: Array, allowed: Array | None, seed: int
                      ) -> tuple[EquivalenceCheck, dict[str, Any]]:
    """The check and the sensitivity function for plotting (``{"time": ..., ...}``)."""
    Mn = _normalised(problem, x)
    crit = problem.criterion
    with np.errstate(all="ignore"):
        bound = float(np.mean([crit.bound(M) for M in Mn]))
    if problem.population:
        return _population(problem, x, Mn, bound, allowed, seed)
    return _individual(problem, x, Mn, bound, allowed)


def _d_points(problem: DesignProblem, Mn: Array, times: Array, exact: bool) -> Array:
    """Sensitivity function of one subject's design at single times (mean over draws)."""
    out = np.zeros(len(times))
    for k, c in enumerate(problem.curves()):
        if exact:
            f, J = exact_outputs(problem.model, c.theta, problem.doses, times, problem.observed,
                                 problem.estimated)
        else:
            f, J = c.at(times)
        out += problem.criterion.sensitivity(Mn[k], sample_information(J, f, problem.error))
    return out / len(Mn)


def _individual(problem: DesignProblem, x: Array, Mn: Array, bound: float, allowed: Array | None
                ) -> tuple[EquivalenceCheck, dict[str, Any]]:
    grid = problem.nominal_curves().grid
    d_grid = _d_points(problem, Mn, grid, exact=False)
    space = np.unique(np.asarray(allowed, dtype=float)) if allowed is not None else np.unique(x)
    d_space = _d_points(problem, Mn, space, exact=True)
    if allowed is not None:
        i = int(np.argmax(d_space))
        maximum, at = d_space[i], space[i]
    else:
        i, j = int(np.argmax(d_grid)), int(np.argmax(d_space))
        maximum, at = (d_grid[i], grid[i]) if d_grid[i] >= d_space[j] else (d_space[j], space[j])
    check = _finish(problem, bound, maximum, [at])
    if isinstance(problem.criterion, DOptimal) and len(Mn) == 1:
        c = problem.nominal_curves()
        points = space if allowed is not None else grid[:: max(1, len(grid) // 500)]
        f, J = (c.at(points) if allowed is None else
                exact_outputs(problem.model, c.theta, problem.doses, points, problem.observed, problem.estimated))
        best = free_weight_optimum(sample_information(J, f, problem.error))
        with np.errstate(all="ignore"):
            ratio = float(np.exp((DOptimal().value(Mn[0]) - DOptimal().value(best)) / Mn.shape[-1]))
        check = replace(check, free_weights=min(ratio, 1.0))
    return check, {"time": grid.tolist(), "value": d_grid.tolist(), "bound": bound,
                   "design": np.unique(x).tolist(), "design_value": _d_points(problem, Mn, np.unique(x), True).tolist()}


def free_weight_optimum(info: Array, iterations: int = 5000, tolerance: float = 1e-4) -> Array:
    """Normalised information of the D-optimal design with free weights on candidate points
    with information ``info`` (G, p, p), by the multiplicative algorithm ``w ← w·d/p``."""
    G, p, _ = info.shape
    w = np.full(G, 1.0 / G)
    for _ in range(iterations):
        M = np.einsum("g,gij->ij", w, info)
        d = np.einsum("ij,gji->g", np.linalg.inv(M), info)
        if d.max() <= p * (1 + tolerance):
            break
        w = w * d / p
    return np.einsum("g,gij->ij", w, info)


def _elementary(problem: DesignProblem, Mn: Array, X: Array, g: int, exact: bool = False) -> Array:
    """Sensitivity function at whole schedules X (S, n) of group g's kind (one subject)."""
    out = np.zeros(X.shape[0])
    crit = problem.criterion
    r = problem.replicates[g]
    var = problem.variability
    assert var is not None
    for k, c in enumerate(problem.curves()):
        if exact:
            rows = [exact_outputs(problem.model, c.theta, problem.doses, row, problem.observed, problem.estimated)
                    for row in X]
            f = np.stack([a for a, _ in rows])
            J = np.stack([b for _, b in rows])
        else:
            f, J = c.at(X)
        th = c.theta[list(problem.estimated)]
        M1 = population_information(J, f, th, problem.random, var.variances, problem.error, r)
        with np.errstate(all="ignore"):
            out += crit.sensitivity(Mn[k], M1)
    return out / len(Mn)


def _population(problem: DesignProblem, x: Array, Mn: Array, bound: float, allowed: Array | None, seed: int
                ) -> tuple[EquivalenceCheck, dict[str, Any]]:
    lo, hi = problem.window
    blocks = problem.blocks()
    best, best_at = -np.inf, np.zeros(0)
    for g, b in enumerate(blocks):
        own = _elementary(problem, Mn, x[b][None, :], g, exact=True)[0]
        if own > best:
            best, best_at = own, x[b]
    done: set[int] = set()
    for g, n in enumerate(problem.layout):
        if n in done:
            continue
        done.add(n)

        def objective(X: Array, g: int = g) -> Array:
            return _elementary(problem, Mn, X, g)

        spacing = problem.spacing
        if allowed is not None:
            found = discrete_search(objective, [n], allowed, spacing, starts=4, seed=seed)
        else:
            found = continuous_search(objective, [n], lo, hi, spacing, starts=4, seed=seed)
        value = _elementary(problem, Mn, found.x[None, :], g, exact=True)[0]
        if value > best:
            best, best_at = value, found.x
    grid = problem.nominal_curves().grid
    slices = []
    for g, b in enumerate(blocks):
        for i in range(b.stop - b.start):
            X = np.repeat(x[b][None, :], len(grid), axis=0)
            X[:, i] = grid
            slices.append({"group": g, "sample": i, "value": _elementary(problem, Mn, X, g).tolist()})
    check = _finish(problem, bound, best, best_at)
    return check, {"time": grid.tolist(), "slices": slices, "bound": bound}
