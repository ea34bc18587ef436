"""The study as the population estimators see it: subjects laid out in padded arrays.

Each subject's observations become one row of ``(N, n_max)`` arrays with a mask, so that
the estimators evaluate every subject (or many draws of every subject) in one batch.
Doses stay per subject; the evaluator (:mod:`.evaluate`) reads them.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..dosing import Dose
from ..estimate.problem import SubjectData
from .residual import ResidualModel, Rows

Array = NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class Design:
    """Observations of N subjects, padded to ``n_max`` rows.

    Attributes
    ----------
    ids : tuple of str
    times, values, lloq : (N, n_max) arrays (values of censored rows hold the LLOQ)
    censored, mask : (N, n_max) bool
    obs_index : (N, n_max) int
        Which model observable each row is.
    doses : tuple of tuple of Dose
    rows : Rows
        The same observations prepared for the residual model.
    """

    ids: tuple[str, ...]
    times: Array
    values: Array
    lloq: Array
    censored: NDArray[np.bool_]
    mask: NDArray[np.bool_]
    obs_index: NDArray[np.int64]
    doses: tuple[tuple[Dose, ...], ...]
    rows: Rows

    @property
    def n_subjects(self) -> int:
        return len(self.ids)

    @property
    def n_obs(self) -> NDArray[np.int64]:
        """Observations per subject."""
        return self.mask.sum(axis=1)

    @property
    def n_quantified(self) -> NDArray[np.int64]:
        """Quantified (not censored) observations per subject."""
        return (self.mask & ~self.censored).sum(axis=1)

    @property
    def total_obs(self) -> int:
        return int(self.mask.sum())

    def flat(self, a: Array) -> Array:
        """Real rows of a padded (N, n_max) array, subject after subject."""
        return np.asarray(a)[self.mask]


def build_design(data: Sequence[SubjectData], residual: ResidualModel) -> Design:
    """Lay out subjects' observations (from :func:`compartments.estimate.problem.subject_data`)."""
    N = len(data)
    n_max = max((d.n for d in data), default=0)
    times = np.zeros((N, n_max))
    values = np.ones((N, n_max))
    lloq = np.full((N, n_max), np.nan)
    cens = np.zeros((N, n_max), bool)
    mask = np.zeros((N, n_max), bool)
    k = np.zeros((N, n_max), np.int64)
    for i, d in enumerate(data):
        n = d.n
        times[i, :n] = d.times
        values[i, :n] = d.values
        lloq[i, :n] = d.lloq
        cens[i, :n] = d.censored
        mask[i, :n] = True
        k[i, :n] = d.obs_index
        if n:  # padding repeats the last time so that batched solvers see sorted times
            times[i, n:] = d.times[-1]
    rows = Rows.build(residual, values, cens, k, mask)
    return Design(ids=tuple(d.id for d in data), times=times, values=values, lloq=lloq, censored=cens,
                  mask=mask, obs_index=k, doses=tuple(tuple(d.doses) for d in data), rows=rows)
