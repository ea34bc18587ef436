"""Linear models by the matrix exponential of an augmented matrix (the reference path).

Over a stretch without events ``x' = A x + c`` is solved exactly by the exponential of an
augmented matrix that also carries the constant input ``c = b + u`` and, on request, the
forward parameter sensitivities (Van Loan's block construction; Van Loan 1978, IEEE TAC
23:395). The eigen-decomposition engine (:mod:`.linear`) is checked against this path and
falls back to it where its eigenvalues are (nearly) repeated or complex.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray
from scipy.linalg import expm

from ..model import Model

Array = NDArray[np.float64]


class ExpmPropagator:
    """Propagate ``[x; S]`` of a linear model with augmented matrix exponentials."""

    def __init__(self, model: Model, theta: Array, sens: bool) -> None:
        n, p = model.n_states, model.n_params
        A, b, Ap, bp = model.linear_parts(theta)
        self.n, self.p, self.sens = n, p, sens
        self.A, self.b, self.bp = A, b, bp
        N = n * (p + 1) if sens else n
        big = np.zeros((N + 1, N + 1))
        big[:n, :n] = A
        if sens:
            for j in range(p):
                blk = slice(n * (j + 1), n * (j + 2))
                big[blk, blk] = A
                big[blk, :n] = Ap[j]
        self.N, self.big = N, big

    def __call__(self, x: Array, S: Array | None, u: Array, uS: Array, start: float, taus: Array
                 ) -> tuple[Array, Array | None]:
        n, p, N, big = self.n, self.p, self.N, self.big
        big[:n, N] = self.b + u
        sens = self.sens and S is not None
        if sens:
            cS = self.bp + uS
            for j in range(p):
                big[n * (j + 1): n * (j + 2), N] = cS[:, j]
            z0 = np.concatenate([x, S.T.reshape(-1)])  # type: ignore[union-attr]
        else:
            z0 = x if N == n else np.concatenate([x, np.zeros(N - n)])
        Z = _propagate(big, N, z0, np.asarray(taus, dtype=float))
        X = Z[:, :n]
        Ss = Z[:, n:].reshape(-1, p, n).transpose(0, 2, 1) if sens else None
        return X, Ss


def _propagate(big: Array, N: int, z0: Array, taus: Array) -> Array:
    """States at offsets ``taus`` (sorted) from ``z0`` under ``dz/dt = M z + c`` (augmented).

    Few offsets: one batched matrix exponential. Many offsets (a fine grid): step from
    one to the next, reusing the exponential of each distinct step (a uniform grid needs
    one), by the semigroup property e^{M(a+b)} = e^{Ma} e^{Mb}.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        if taus.size <= 16:
            E = expm(big[None, :, :] * taus[:, None, None])  # (K, N+1, N+1)
            return E[:, :N, :N] @ z0 + E[:, :N, N]
        steps = np.diff(np.r_[0.0, taus])
        scale = max(float(taus[-1]), 1e-300)
        keys = np.round(steps / scale, 12)
        uniq, inverse = np.unique(keys, return_inverse=True)
        reps = {}
        for j in range(uniq.size):
            first = int(np.flatnonzero(inverse == j)[0])
            reps[j] = expm(big * steps[first])
        out = np.empty((taus.size, N))
        z = np.r_[z0, 1.0]
        for i in range(taus.size):
            z = reps[int(inverse[i])] @ z
            out[i] = z[:N]
        return out


def monodromy(model: Model, theta: Array, tau: float) -> Array:
    """``∂x(t + τ)/∂x(t) = e^{Aτ}`` of a linear model (doses and inputs add constants)."""
    A = model.linear_parts(theta)[0]
    return expm(A * tau)
