"""The one-method protocol every estimation stage follows, and its result.

A stage takes a :class:`~compartments.estimate.problem.Problem` and starting points on the
working scale and returns a :class:`StageResult`. Stages compose (network stage, then
likelihood fit) and can be measured apart.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

from .problem import Problem

Array = NDArray[np.float64]


@dataclass(frozen=True)
class StageResult:
    """What a stage found.

    Attributes
    ----------
    name : str
        Stage name ("network", "likelihood", ...).
    phi : (k,) array
        Best free parameters on the working scale (log for log-scaled parameters).
    candidates : tuple of arrays
        Other promising points, best first (``phi`` included as the first).
    objective : float or None
        The stage's own objective at ``phi`` (stages differ; compare with care).
    wall_time : float, s
    iterations : int
    status : str
        "converged", "stopped" (iteration or time limit) or "failed".
    message : str
        A plain sentence on how it ended.
    extra : mapping
        Stage-specific details (error-model parameters, losses, ...).
    """

    name: str
    phi: Array
    candidates: tuple[Array, ...] = ()
    objective: float | None = None
    wall_time: float = 0.0
    iterations: int = 0
    status: str = "converged"
    message: str = ""
    extra: Mapping[str, Any] = field(default_factory=dict)


class Stage(Protocol):
    """A step of the estimator."""

    name: str

    def run(self, problem: Problem, starts: Sequence[Array]) -> StageResult:  # pragma: no cover
        ...
