"""Error models and the −2 log-likelihood with its gradient.

For an observation ``y`` with prediction ``f`` and residual SD ``σ``:

* additive: ``σ = a``; proportional: ``σ = b·|f|``; combined: ``σ = √(a² + b²f²)``;
* log-normal: ``log y = log f + ε``, ``ε ~ N(0, σ²)``; the density is taken on the
  ``y`` scale (the ``2 log y`` Jacobian term is included) so that −2LL is comparable
  across error models.

A value below the limit of quantification enters through the normal CDF,
``−2 log Φ((LLOQ − f)/σ)`` (Beal 2001, J Pharmacokinet Pharmacodyn 28:481, method M3).
Error parameters are per observable and kept on the log scale (``η = log a``, ...).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.special import log_ndtr

Array = NDArray[np.float64]

LOG2PI = float(np.log(2 * np.pi))


def error_parameter_names(error: str, observables: tuple[str, ...]) -> tuple[str, ...]:
    """Names of the error-model parameters, e.g. ``("sd_concentration",)``."""
    kinds = {"additive": ("sd",), "proportional": ("cv",), "combined": ("sd", "cv"), "lognormal": ("sdlog",)}[error]
    return tuple(f"{k}_{o}" for o in observables for k in kinds)


def n_error_parameters(error: str) -> int:
    return 2 if error == "combined" else 1


@dataclass(frozen=True)
class Terms:
    """Per-observation −2LL terms and their derivatives."""

    value: float
    d_f: Array  # (N,) ∂(−2LL)/∂f
    d_eta: Array  # (E,) ∂(−2LL)/∂η


def _sd(error: str, f: Array, eta: Array, k: NDArray[np.int64], floor: float) -> tuple[Array, Array, Array]:
    """σ per observation, ∂σ/∂f, and ∂σ/∂η (N, E)."""
    N = f.size
    E = eta.size
    dsd_eta = np.zeros((N, E))
    if error in ("additive", "lognormal"):
        a = np.exp(eta)[k]
        dsd_eta[np.arange(N), k] = a
        return a, np.zeros(N), dsd_eta
    if error == "proportional":
        b = np.exp(eta)[k]
        af = np.maximum(np.abs(f), floor)
        sd = b * af
        dsd_df = np.where(np.abs(f) > floor, b * np.sign(f), 0.0)
        dsd_eta[np.arange(N), k] = sd
        return sd, dsd_df, dsd_eta
    # combined: eta = [log a_0, log b_0, log a_1, log b_1, ...]
    a = np.exp(eta[0::2])[k]
    b = np.exp(eta[1::2])[k]
    sd = np.sqrt(a**2 + (b * f) ** 2)
    sd = np.maximum(sd, 1e-300)
    dsd_df = b**2 * f / sd
    dsd_eta[np.arange(N), 2 * k] = a**2 / sd
    dsd_eta[np.arange(N), 2 * k + 1] = (b * f) ** 2 / sd
    return sd, dsd_df, dsd_eta


def neg2ll(
    error: str,
    y: Array,
    f: Array,
    eta: Array,
    k: NDArray[np.int64],
    censored: NDArray[np.bool_],
    floor: float = 1e-12,
) -> Terms:
    """−2 log-likelihood of observations ``y`` given predictions ``f``.

    Parameters
    ----------
    error : str
    y : (N,) values (for censored rows, the LLOQ)
    f : (N,) predictions
    eta : (E,) log error parameters
    k : (N,) observable index per row
    censored : (N,) bool
    floor : float
        Smallest |f| used in a proportional SD or a log (avoids division by zero).
    """
    yt, ft = y, f
    dft_df = np.ones_like(f)
    if error == "lognormal":
        fpos = np.maximum(f, floor)
        yt = np.log(np.maximum(y, floor))
        ft = np.log(fpos)
        dft_df = np.where(f > floor, 1.0 / fpos, 0.0)
    sd, dsd_df, dsd_eta = _sd(error, f, eta, k, floor)
    z = (yt - ft) / sd
    # derivatives of z w.r.t f and eta
    dz_df = (-dft_df - z * dsd_df) / sd
    dz_deta = -(z / sd)[:, None] * dsd_eta
    unc = ~censored
    total = 0.0
    d_f = np.zeros_like(f)
    d_eta = np.zeros(eta.size)
    if np.any(unc):
        zu = z[unc]
        total += float(np.sum(LOG2PI + 2 * np.log(sd[unc]) + zu**2))
        if error == "lognormal":
            total += float(np.sum(2 * yt[unc]))  # Jacobian of the log transform
        d_f[unc] = 2 * dsd_df[unc] / sd[unc] + 2 * zu * dz_df[unc]
        d_eta += np.sum(2 * dsd_eta[unc] / sd[unc, None] + 2 * zu[:, None] * dz_deta[unc], axis=0)
    if np.any(censored):
        zc = z[censored]
        lp = log_ndtr(zc)
        total += float(np.sum(-2 * lp))
        # d(-2 log Φ(z))/dz = -2 φ(z)/Φ(z) = -2 exp(log φ - log Φ)
        ratio = np.exp(-0.5 * zc**2 - 0.5 * LOG2PI - lp)
        d_f[censored] = -2 * ratio * dz_df[censored]
        d_eta += np.sum((-2 * ratio)[:, None] * dz_deta[censored], axis=0)
    return Terms(total, d_f, d_eta)


def initial_eta(error: str, y: Array, f: Array, k: NDArray[np.int64], censored: NDArray[np.bool_],
                n_obs_kinds: int, floor: float = 1e-12) -> Array:
    """Error parameters from residuals at a first fit (moment estimates, log scale)."""
    out = []
    for j in range(n_obs_kinds):
        m = (k == j) & ~censored
        if not np.any(m):
            out.extend([0.0] * n_error_parameters(error))
            continue
        yy, ff = y[m], f[m]
        scale = max(float(np.mean(np.abs(yy))), floor)
        if error == "additive":
            s = float(np.sqrt(np.mean((yy - ff) ** 2)))
            out.append(np.log(max(s, 1e-6 * scale)))
        elif error == "proportional":
            r = (yy - ff) / np.maximum(np.abs(ff), max(floor, 1e-6 * scale))
            out.append(np.log(max(float(np.sqrt(np.mean(r**2))), 1e-6)))
        elif error == "lognormal":
            r = np.log(np.maximum(yy, floor)) - np.log(np.maximum(ff, floor))
            out.append(np.log(max(float(np.sqrt(np.mean(r**2))), 1e-6)))
        else:
            s = float(np.sqrt(np.mean((yy - ff) ** 2)))
            out.append(np.log(max(0.5 * s, 1e-6 * scale)))
            r = (yy - ff) / np.maximum(np.abs(ff), max(floor, 1e-6 * scale))
            out.append(np.log(max(0.5 * float(np.sqrt(np.mean(r**2))), 1e-6)))
    return np.array(out, dtype=float)
