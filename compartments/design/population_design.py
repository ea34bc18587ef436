"""Fisher information of a population design (N subjects, each sampled at a schedule).

Each subject's parameters are log-normal around the typical values,
``θ_i = θ·exp(η_i)`` with ``η_i ~ N(0, diag(ω²))`` for the parameters given a
between-subject variability. Linearising the model around ``η = 0`` (the first-order
approximation; Mentré, Mallet & Baccar 1997, Biometrika 84:429) makes a subject's
observations ``y ~ N(f(θ), V)`` with

    V = Z Ω Zᵀ + Σ,     Z = ∂f/∂η = J·diag(θ),     Σ = diag(σ²(f)),

and the information of one subject's schedule is, in the block-diagonal form of Retout,
Mentré & Bruno (2002, Stat Med 21:2633):

* typical values: ``Jᵀ V⁻¹ J``;
* variances and error parameters λ: ``½ tr(V⁻¹ ∂V/∂λ_k V⁻¹ ∂V/∂λ_l)``.

A design's information is the sum over its groups of ``subjects × information of the
group's schedule``. Replicate measurements at a time enter as ``σ²/r``.

Numerics only: no I/O and no presentation.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..errors import UsageError
from .fisher import ResidualError

Array = NDArray[np.float64]

__all__ = ["Variability", "population_information"]


@dataclass(frozen=True)
class Variability:
    """Between-subject variability: the SD of ``η`` (log scale, about the CV) per parameter.

    Examples
    --------
    >>> v = Variability.from_mapping({"ka": 0.3}, ("ka", "ke"))
    >>> v.names, v.variances.tolist()
    (('ka',), [0.09])
    """

    names: tuple[str, ...]
    sd: tuple[float, ...]

    @property
    def variances(self) -> Array:
        return np.asarray(self.sd, dtype=float) ** 2

    @classmethod
    def from_mapping(cls, values: Mapping[str, float], estimated: Sequence[str]) -> Variability:
        names, sds = [], []
        for k, v in values.items():
            if k not in estimated:
                raise UsageError(f"variability={{{k!r}: ...}}: {k!r} is not an estimated parameter; "
                                 f"estimated: {', '.join(estimated)}")
            try:
                x = float(v)
            except (TypeError, ValueError):
                raise UsageError(f"variability of {k} = {v!r} is not a number") from None
            if not (np.isfinite(x) and x > 0):
                raise UsageError(f"variability of {k} = {v!r} must be a positive SD of the log "
                                 "(e.g. 0.3 for about 30% between subjects)")
            names.append(k)
            sds.append(x)
        order = sorted(range(len(names)), key=lambda i: list(estimated).index(names[i]))
        return cls(tuple(names[i] for i in order), tuple(sds[i] for i in order))

    def to_dict(self) -> dict[str, float]:
        return dict(zip(self.names, self.sd, strict=True))


def population_information(J: Array, f: Array, theta: Array, random: Sequence[int], variances: Array,
                           error: ResidualError, replicates: Array) -> Array:
    """Information of one subject sampled at a schedule (first order, block-diagonal).

    Parameters
    ----------
    J : (S, n, m, p) array
        Sensitivities at the n times of S candidate schedules.
    f : (S, n, m) array
        Predictions.
    theta : (p,) array
        Typical values of the estimated parameters.
    random : sequence of int
        Indices (into the p estimated parameters) with between-subject variability.
    variances : (q,) array
        Their variances ω².
    error : ResidualError
    replicates : (n,) array
        Measurements at each time.

    Returns
    -------
    (S, P, P) array
        Ordered: typical values (p), variances (q), error parameters (E).

    Examples
    --------
    One subject, one time, one parameter with no variability and additive SD 1: the
    information about the typical value is J² (and 2 N/σ² = 2 about the SD).

    >>> e = ResidualError("additive", sd=(1.0,))
    >>> M = population_information(np.array([[[[3.0]]]]), np.array([[[1.0]]]), np.array([1.0]), [],
    ...                            np.zeros(0), e, np.ones(1))
    >>> M[0].tolist()
    [[9.0, 0.0], [0.0, 2.0]]
    """
    S, n, m, p = J.shape
    N = n * m
    r = np.repeat(np.asarray(replicates, dtype=float), m)  # (N,)
    F = J.reshape(S, N, p)
    var = error.variance(f).reshape(S, N) / r
    dvar = error.variance_derivatives(f).reshape(S, N, -1) / r[:, None]
    silent = var <= 0  # predicted 0 under proportional error: carries nothing
    if silent.any():
        var = np.where(silent, 1.0, var)
        F = np.where(silent[..., None], 0.0, F)
        dvar = np.where(silent[..., None], 0.0, dvar)
    random = list(random)
    Z = F[..., random] * np.asarray(theta)[random]  # (S, N, q)
    V = np.einsum("snk,k,smk->snm", Z, np.asarray(variances, dtype=float), Z)
    V[:, np.arange(N), np.arange(N)] += var
    W = np.linalg.inv(V)
    q, E = len(random), dvar.shape[-1]
    P = p + q + E
    M = np.zeros((S, P, P))
    M[:, :p, :p] = np.einsum("sni,snm,smj->sij", F, W, F)
    WZ = W @ Z  # (S, N, q)
    G = np.einsum("snk,snl->skl", Z, WZ)
    M[:, p:p + q, p:p + q] = 0.5 * G**2
    M[:, p:p + q, p + q:] = 0.5 * np.einsum("snk,sne->ske", WZ**2, dvar)
    M[:, p + q:, p:p + q] = np.swapaxes(M[:, p:p + q, p + q:], 1, 2)
    M[:, p + q:, p + q:] = 0.5 * np.einsum("snm,sme,snf->sef", W**2, dvar, dvar)
    return M


def labels(estimated: Sequence[str], variability: Variability, error: ResidualError,
           observed: Sequence[str]) -> dict[str, Any]:
    """Names of the population parameters in information-matrix order, by kind."""
    return {
        "typical": tuple(estimated),
        "variance": tuple(variability.names),
        "error": error.parameter_names(observed),
    }
