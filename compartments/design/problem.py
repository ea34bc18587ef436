"""A design problem: the model, the parameter values (or draws from a prior), what is
estimated and observed, the doses, the residual error and the layout of the schedule.

It turns a batch of schedules into information matrices — from splines during the
search, exactly (by simulation) for the reported numbers — and into criterion values.

Numerics only: no I/O and no presentation.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from ..dosing import Dose
from ..model import Model
from .criteria import Criterion
from .curves import Curves, build_curves, exact_outputs
from .fisher import ResidualError, sample_information
from .population_design import Variability, population_information
from .search import blocks

Array = NDArray[np.float64]

__all__ = ["DesignProblem"]


@dataclass
class DesignProblem:
    """Everything a schedule's information depends on.

    Attributes
    ----------
    model : Model
    thetas : (K, P) array
        Parameter vectors: the nominal one (K = 1) or draws from a prior.
    nominal : (P,) array
    estimated, observed : tuple of int
        Indices into the model's parameters and observables.
    doses : sequence of Dose
    window : (float, float)
    error : ResidualError
    criterion : Criterion
    layout : tuple of int
        Samples per group.
    subjects : tuple of int
        Subjects per group (1 for a single-subject design).
    replicates : tuple of (n,) arrays
        Measurements at each time, per group.
    variability : Variability or None
        Between-subject variability (a population design); None for one subject.
    spacing : float
        Least time between two samples of one subject.
    """

    model: Model
    thetas: Array
    nominal: Array
    estimated: tuple[int, ...]
    observed: tuple[int, ...]
    doses: Sequence[Dose]
    window: tuple[float, float]
    error: ResidualError
    criterion: Criterion
    layout: tuple[int, ...]
    subjects: tuple[int, ...]
    replicates: tuple[Array, ...]
    variability: Variability | None = None
    spacing: float = 0.0
    _curves: list[Curves] = field(default_factory=list, repr=False)
    _nominal_curves: Curves | None = field(default=None, repr=False)

    # ------------------------------------------------------------------ set-up
    @property
    def population(self) -> bool:
        return self.variability is not None

    @property
    def random(self) -> list[int]:
        """Positions (among the estimated parameters) with between-subject variability."""
        if self.variability is None:
            return []
        names = [self.model.parameter_names[i] for i in self.estimated]
        return [names.index(n) for n in self.variability.names]

    @property
    def size(self) -> int:
        """Parameters in the information matrix."""
        p = len(self.estimated)
        if self.variability is None:
            return p
        return p + len(self.variability.names) + len(self.error.parameter_values())

    def scale(self) -> Array:
        """Nominal values in information-matrix order (for relative standard errors)."""
        values = [self.nominal[i] for i in self.estimated]
        if self.variability is not None:
            values += list(self.variability.variances) + list(self.error.parameter_values())
        return np.asarray(values, dtype=float)

    def nominal_curves(self) -> Curves:
        if self._nominal_curves is None:
            self._nominal_curves = build_curves(self.model, self.nominal, self.doses, self.window,
                                                self.observed, self.estimated)
        return self._nominal_curves

    def curves(self) -> list[Curves]:
        if not self._curves:
            self._curves = [build_curves(self.model, th, self.doses, self.window, self.observed, self.estimated)
                            for th in self.thetas]
        return self._curves

    # ------------------------------------------------------------------ information
    def _group_information(self, f: Array, J: Array, theta: Array, g: int) -> Array:
        """Information of group g for outputs (S, n, m) and sensitivities (S, n, m, p)."""
        r = self.replicates[g]
        if self.variability is None:
            return sample_information(J, f, self.error, r).sum(axis=1) * self.subjects[g]
        th = theta[list(self.estimated)]
        return self.subjects[g] * population_information(J, f, th, self.random, self.variability.variances,
                                                         self.error, r)

    def blocks(self) -> list[slice]:
        """The slice of each group's times in a flat schedule."""
        return blocks(self.layout)

    def information(self, X: Array) -> Array:
        """Information matrices (K, S, P, P) of schedules X (S, N), from the splines."""
        X = np.atleast_2d(X)
        out = np.zeros((len(self.thetas), X.shape[0], self.size, self.size))
        for k, c in enumerate(self.curves()):
            for g, b in enumerate(self.blocks()):
                f, J = c.at(X[:, b])
                out[k] += self._group_information(f, J, c.theta, g)
        return out

    def exact_information(self, x: Array, thetas: Array | None = None) -> Array:
        """Information matrices (K, P, P) of one schedule, exactly (by simulation)."""
        x = np.asarray(x, dtype=float)
        thetas = self.thetas if thetas is None else np.atleast_2d(thetas)
        out = np.zeros((len(thetas), self.size, self.size))
        for k, th in enumerate(thetas):
            f, J = exact_outputs(self.model, th, self.doses, x, self.observed, self.estimated)
            for g, b in enumerate(self.blocks()):
                out[k] += self._group_information(f[None, b], J[None, b], th, g)[0]
        return out

    def objective(self, X: Array) -> Array:
        """Criterion value (mean over draws) of schedules X (S, N), from the splines."""
        M = self.information(X)
        with np.errstate(all="ignore"):
            return np.mean(self.criterion.value(M), axis=0)

    def exact_value(self, x: Array) -> float:
        with np.errstate(all="ignore"):
            return float(np.mean(self.criterion.value(self.exact_information(x))))

    def total_weight(self) -> float:
        """Measurements (one subject) or subjects (population) in the design: the
        normalisation of the information matrix for the equivalence theorem."""
        if self.variability is None:
            return float(sum(self.subjects[g] * np.sum(r) for g, r in enumerate(self.replicates)))
        return float(sum(self.subjects))
