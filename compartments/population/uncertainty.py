"""Covariance of the population estimates, and SE / %RSE / CI of what is reported.

The covariance of the estimation vector ``x`` is the inverse of half the Hessian of the
FOCE-I objective (``−2 log L``) at the estimate, the Hessian by central differences of its
exact gradient (:mod:`.foce`). For SAEM estimates this is the linearisation method: the
FOCE-I approximation of the likelihood around the individual modes, evaluated at the SAEM
estimate. ``covariance="sandwich"`` gives ``R⁻¹ S R⁻¹`` with ``R`` half the Hessian and
``S = Σ_i ¼ g_i g_iᵀ`` from each subject's gradient (White 1982, Econometrica 50:1).

Reported quantities and their intervals (Wald, normal quantile):

* typical values: on the individual scale (log for log-scaled parameters), back-transformed;
* covariate effects: on the estimation scale (categorical factors: log factor, exponentiated);
* variances: delta method from the Cholesky entries, interval on the log of the variance;
  covariances: delta method, symmetric interval;
* error parameters: on the log scale, back-transformed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy import stats

from .model import PopulationModel

Array = NDArray[np.float64]


@dataclass(frozen=True)
class Covariance:
    """Covariance of x and the reason when it could not be computed."""

    matrix: Array  # (size, size), nan when failed
    method: str
    failed: str = ""  # plain sentence when the covariance step failed


def covariance_from_hessian(H: Array, subject_gradients: Array | None, method: str,
                            labels: tuple[str, ...]) -> Covariance:
    """``2 H⁻¹`` (or the sandwich) from the Hessian of −2 log L; a plain reason when it fails."""
    n = H.shape[0]
    nan = np.full((n, n), np.nan)
    if not np.all(np.isfinite(H)):
        return Covariance(nan, method, "the Hessian of the objective has non-finite entries at the estimate")
    R = 0.5 * (H + H.T) / 2.0
    w, v = np.linalg.eigh(R)
    if w[0] <= 1e-10 * max(abs(w[-1]), 1e-300):
        vec = np.abs(v[:, 0])
        worst = ", ".join(labels[i] for i in np.argsort(-vec)[:3] if vec[i] > 0.3 * vec.max())
        return Covariance(nan, method, "the Hessian of the objective is not positive definite at the estimate "
                          f"(the flattest direction involves {worst}): the estimate may not be a minimum, or "
                          "the data do not determine these quantities")
    Rinv = (v / w) @ v.T
    if method == "sandwich" and subject_gradients is not None:
        S = 0.25 * subject_gradients.T @ subject_gradients
        return Covariance(Rinv @ S @ Rinv, method)
    return Covariance(Rinv, method)


@dataclass(frozen=True)
class Reported:
    """Estimates as reported, with SE, %RSE and CI, keyed by label."""

    estimates: dict[str, float]
    se: dict[str, float]
    rse: dict[str, float]
    ci: dict[str, tuple[float, float]]


def reported(pm: PopulationModel, x: Array, cov: Array, level: float = 0.95) -> Reported:
    """Typical values, effects, variances and error parameters with SE / %RSE / CI."""
    with np.errstate(over="ignore", invalid="ignore"):  # an unbounded interval end is inf
        return _reported(pm, x, cov, level)


def _reported(pm: PopulationModel, x: Array, cov: Array, level: float) -> Reported:
    z = float(stats.norm.ppf(0.5 + level / 2))
    sm, sb, sl, ss = pm.slices
    est: dict[str, float] = {}
    se: dict[str, float] = {}
    ci: dict[str, tuple[float, float]] = {}
    sd_x = np.sqrt(np.where(np.diag(cov) >= 0, np.diag(cov), np.nan))
    for j, n in enumerate(pm.names):
        v, s = x[sm][j], sd_x[sm][j]
        if pm.log_scale[j]:
            est[n] = float(np.exp(v))
            se[n] = float(np.exp(v) * s)
            ci[n] = (float(np.exp(v - z * s)), float(np.exp(v + z * s)))
        else:
            est[n], se[n], ci[n] = float(v), float(s), (float(v - z * s), float(v + z * s))
    j0 = sb.start
    for e in pm.effects:
        for lab in e.labels:
            v, s = x[j0], sd_x[j0]
            if e.form == "categorical":
                est[lab], se[lab] = float(np.exp(v)), float(np.exp(v) * s)
                ci[lab] = (float(np.exp(v - z * s)), float(np.exp(v + z * s)))
            else:
                est[lab], se[lab], ci[lab] = float(v), float(s), (float(v - z * s), float(v + z * s))
            j0 += 1
    om = pm.omega(x)
    dO = pm.domega(x)  # (n_chol, q, q)
    cl = cov[sl, sl]
    for lab, (r, c) in zip(pm.variance_labels, pm.chol_index, strict=True):
        g = dO[:, r, c]
        var = float(g @ cl @ g)
        s = float(np.sqrt(var)) if var >= 0 else float("nan")
        v = float(om[r, c])
        est[lab], se[lab] = v, s
        if r == c and v > 0:
            sl_ = s / v
            ci[lab] = (float(v * np.exp(-z * sl_)), float(v * np.exp(z * sl_)))
        else:
            ci[lab] = (v - z * s, v + z * s)
    for j, n in enumerate(pm.residual.names):
        v, s = x[ss][j], sd_x[ss][j]
        est[n], se[n] = float(np.exp(v)), float(np.exp(v) * s)
        ci[n] = (float(np.exp(v - z * s)), float(np.exp(v + z * s)))
    rse = {k: (100.0 * se[k] / abs(est[k]) if est[k] != 0 else float("inf")) for k in est}
    return Reported(est, se, rse, ci)


def x_labels(pm: PopulationModel) -> tuple[str, ...]:
    """Labels of the estimation vector's entries (what the covariance matrix is indexed by)."""
    mu = tuple(f"log {n}" if pm.log_scale[j] else n for j, n in enumerate(pm.names))
    eff = []
    for e in pm.effects:
        eff += [f"log factor {lab}" if e.form == "categorical" else lab for lab in e.labels]
    chol = tuple(f"cholesky {lab}" for lab in pm.variance_labels)
    err = tuple(f"log {n}" for n in pm.residual.names)
    return mu + tuple(eff) + chol + err
