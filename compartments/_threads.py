"""Keep BLAS single-threaded for the small matrices this package works with.

The simulator and estimator multiply and exponentiate matrices of a few rows; a
multithreaded BLAS spends far longer waking its threads than computing (measured here:
a 4×4 matrix exponential took 1.5 ms with the default OpenBLAS threads and 0.01 ms with
one). Parallelism comes from running subjects in separate processes instead. Set the
environment variable ``COMPARTMENTS_BLAS_THREADS`` to another number to change this.
"""

from __future__ import annotations

import os

_done = False


def limit_blas_threads() -> None:
    """Limit BLAS to ``COMPARTMENTS_BLAS_THREADS`` (default 1) threads, once per process."""
    global _done
    if _done:
        return
    _done = True
    try:
        n = int(os.environ.get("COMPARTMENTS_BLAS_THREADS", "1"))
    except ValueError:
        n = 1
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl is a dependency
        return
    threadpool_limits(limits=max(n, 1), user_api="blas")
