"""Second derivatives by central differences of an analytic gradient."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]


def hessian(fun: Callable[[Array], Array], x: Array, rel: float = 1e-5) -> Array:
    """Symmetric Hessian by central differences of an analytic gradient ``fun``."""
    n = x.size
    H = np.zeros((n, n))
    for i in range(n):
        h = rel * max(1.0, abs(x[i]))
        xp, xm = x.copy(), x.copy()
        xp[i] += h
        xm[i] -= h
        H[:, i] = (fun(xp) - fun(xm)) / (2 * h)
    return 0.5 * (H + H.T)
