"""Residual error for the population estimators: per-row −2 log-likelihood and derivatives.

This is the small internal adapter between the population code and the error models. It
asks an error model for the residual SD ``σ(f, s)`` of each observation and its first and
second derivatives, and the transform ``u(f)`` the error acts on (the identity, or ``log``
for log-normal error), and builds from them everything the estimators need, per row:

* ``t = −2 log p(y | f, s)`` with all constants: ``log 2π + 2 log σ + z²`` for a quantified
  value (``+ 2 log y`` under log-normal error, the Jacobian that puts the density on the
  ``y`` scale), and ``−2 log Φ(z)`` for a value below the limit of quantification (Beal
  2001, J Pharmacokinet Pharmacodyn 28:481, method M3), with ``z = (u(y) − u(f))/σ``;
* its derivatives in ``f`` (first and second) and in the log error parameters ``s``;
* the first-order (Gauss–Newton) weight ``w`` with ``½ ∂²t/∂η² ≈ w (∂f/∂η)ᵀ(∂f/∂η)`` used by
  FOCE-I (``w = u_f²/σ²`` for a quantified value — the residual variance evaluated at the
  individual estimate is the interaction; ``w = ½ t_zz z_f²`` for a censored one), with its
  derivatives in ``f`` and ``s``;
* the expected information of ``t`` in ``(f, s)`` (``h = 2u_f²/σ² + 4σ_f²/σ²`` in ``f``,
  ``4σ_f σ_s/σ²`` and ``4σ_s σ_sᵀ/σ²``; ``t_zz`` times the outer product of ``z``'s
  derivatives for a censored row) for Fisher scoring.

Error parameters are per observable and on the log scale (``s = log a``, ``log b`` ...), in
the order of :func:`compartments.estimate.likelihood.error_parameter_names`.

When the error-model objects land, only :class:`ResidualModel` changes: its ``sd`` and
``transform`` methods are the two things read from an error model.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.special import log_ndtr

from ..errors import UsageError
from ..estimate.likelihood import error_parameter_names, n_error_parameters

Array = NDArray[np.float64]

LOG2PI = float(np.log(2 * np.pi))
ERROR_MODELS = ("additive", "proportional", "combined", "lognormal")


@dataclass(frozen=True)
class SD:
    """Residual SD per row and its derivatives (``...`` is the batch shape, E error parameters)."""

    sd: Array  # (...)
    f: Array  # ∂σ/∂f
    ff: Array  # ∂²σ/∂f²
    s: Array  # (..., E) ∂σ/∂s
    fs: Array  # (..., E) ∂²σ/∂f∂s


@dataclass(frozen=True)
class ResidualModel:
    """One of the four error models, for ``n_observables`` observables.

    Parameters
    ----------
    kind : {"additive", "proportional", "combined", "lognormal"}
    observables : tuple of str
        Names of the model's observables (error parameters are per observable).
    floor : float
        Smallest ``|f|`` used in a proportional SD or a log (avoids division by zero).

    Examples
    --------
    >>> r = ResidualModel("proportional", ("concentration",))
    >>> r.names, r.n_params
    (('cv_concentration',), 1)
    """

    kind: str
    observables: tuple[str, ...]
    floor: float = 1e-12

    def __post_init__(self) -> None:
        if self.kind not in ERROR_MODELS:
            raise UsageError(f"error must be one of {', '.join(ERROR_MODELS)}, got {self.kind!r}")

    @property
    def names(self) -> tuple[str, ...]:
        return error_parameter_names(self.kind, self.observables)

    @property
    def per_observable(self) -> int:
        return n_error_parameters(self.kind)

    @property
    def n_params(self) -> int:
        return self.per_observable * len(self.observables)

    @property
    def log_transform(self) -> bool:
        return self.kind == "lognormal"

    def transform(self, x: Array) -> tuple[Array, Array, Array]:
        """``u(x)``, ``u'(x)``, ``u''(x)``: the scale the error acts on."""
        if not self.log_transform:
            return x, np.ones_like(x), np.zeros_like(x)
        pos = np.maximum(x, self.floor)
        inside = x > self.floor
        return np.log(pos), np.where(inside, 1.0 / pos, 0.0), np.where(inside, -1.0 / pos**2, 0.0)

    def sd(self, f: Array, s: Array, k: NDArray[np.int64]) -> SD:
        """σ per row and its derivatives in ``f`` and ``s`` (rows of observable ``k``)."""
        E = self.n_params
        shape = f.shape
        ds = np.zeros(shape + (E,))
        dfs = np.zeros(shape + (E,))
        zero = np.zeros(shape)
        if self.kind in ("additive", "lognormal"):
            a = np.exp(s)[k]
            np.put_along_axis(ds, k[..., None], a[..., None], axis=-1)
            return SD(a, zero, zero, ds, dfs)
        if self.kind == "proportional":
            b = np.exp(s)[k]
            inside = np.abs(f) > self.floor
            sd = b * np.maximum(np.abs(f), self.floor)
            d1 = np.where(inside, b * np.sign(f), 0.0)
            np.put_along_axis(ds, k[..., None], sd[..., None], axis=-1)
            np.put_along_axis(dfs, k[..., None], d1[..., None], axis=-1)
            return SD(sd, d1, zero, ds, dfs)
        a = np.exp(s[0::2])[k]
        b = np.exp(s[1::2])[k]
        sd = np.maximum(np.sqrt(a**2 + (b * f) ** 2), 1e-300)
        d1 = b**2 * f / sd
        d2 = a**2 * b**2 / sd**3
        np.put_along_axis(ds, 2 * k[..., None], (a**2 / sd)[..., None], axis=-1)
        np.put_along_axis(ds, 2 * k[..., None] + 1, ((b * f) ** 2 / sd)[..., None], axis=-1)
        np.put_along_axis(dfs, 2 * k[..., None], (-(a**2) * b**2 * f / sd**3)[..., None], axis=-1)
        np.put_along_axis(dfs, 2 * k[..., None] + 1, (2 * b**2 * f / sd - b**4 * f**3 / sd**3)[..., None], axis=-1)
        return SD(sd, d1, d2, ds, dfs)


@dataclass(frozen=True)
class Rows:
    """Observations laid out for batch evaluation (padded; ``mask`` marks real rows).

    ``target`` is the transformed value ``u(y)`` (for a censored row, ``u(LLOQ)``) and
    ``constant`` the part of ``t`` that depends on neither ``f`` nor ``s`` (the log-normal
    Jacobian ``2 log y``).
    """

    target: Array
    censored: NDArray[np.bool_]
    k: NDArray[np.int64]
    mask: NDArray[np.bool_]
    constant: Array

    @classmethod
    def build(cls, residual: ResidualModel, values: Array, censored: NDArray[np.bool_],
              k: NDArray[np.int64], mask: NDArray[np.bool_]) -> Rows:
        v = np.where(mask, values, 1.0)
        target, _, _ = residual.transform(v)
        constant = np.where(mask & ~censored, 2.0 * target, 0.0) if residual.log_transform else np.zeros_like(v)
        return cls(target=target, censored=censored & mask, k=np.where(mask, k, 0), mask=mask, constant=constant)

    def take(self, index: NDArray[np.int64]) -> Rows:
        """The rows of the subjects ``index`` (one batch row each, repeats allowed)."""
        return Rows(self.target[index], self.censored[index], self.k[index], self.mask[index], self.constant[index])


@dataclass(frozen=True)
class Terms:
    """Per-row −2 log-likelihood and derivatives (0 on padding)."""

    t: Array
    t_f: Array | None = None
    t_ff: Array | None = None
    t_s: Array | None = None  # (..., E)
    t_fs: Array | None = None  # (..., E)
    w: Array | None = None
    w_f: Array | None = None
    w_s: Array | None = None  # (..., E)
    h: Array | None = None
    h_fs: Array | None = None  # (..., E) expected information, f–s block
    h_ss: Array | None = None  # (..., E, E) expected information, s–s block


def _mills(z: Array) -> tuple[Array, Array]:
    """``log Φ(z)`` and ``r = φ(z)/Φ(z)`` without overflow."""
    lp = log_ndtr(z)
    return lp, np.exp(-0.5 * z**2 - 0.5 * LOG2PI - lp)


def terms(residual: ResidualModel, rows: Rows, f: Array, s: Array, order: int = 0) -> Terms:
    """−2 log p(y | f, s) per row, with derivatives up to ``order`` (0, 1 or 2).

    ``order=1`` gives ``t_f``, ``t_s`` and the scoring information ``h``; ``order=2`` adds
    ``t_ff``, ``t_fs`` and the FOCE-I weight ``w`` with ``w_f`` and ``w_s``.

    Non-finite predictions (a simulation that failed) give ``t = +inf``.
    """
    m = rows.mask
    cens = rows.censored
    unc = m & ~cens
    bad = m & ~np.isfinite(f)
    f = np.where(np.isfinite(f), f, 1.0)
    u, u_f, u_ff = residual.transform(f)
    q = residual.sd(f, s, rows.k)
    sd = q.sd
    z = (rows.target - u) / sd
    lp, r = _mills(z) if cens.any() else (np.zeros_like(z), np.zeros_like(z))
    t = np.where(unc, LOG2PI + 2 * np.log(sd) + z**2 + rows.constant, np.where(cens, -2 * lp, 0.0))
    t = np.where(bad, np.inf, t)
    if order == 0:
        return Terms(t)
    z_f = (-u_f - z * q.f) / sd
    z_s = -(z / sd)[..., None] * q.s
    t_z = -2 * r
    t_zz = 2 * r * (z + r)
    um = unc[..., None]
    cm = cens[..., None]
    t_f = np.where(unc, 2 * q.f / sd + 2 * z * z_f, np.where(cens, t_z * z_f, 0.0))
    t_s = np.where(um, 2 * q.s / sd[..., None] + 2 * (z[..., None] * z_s), np.where(cm, t_z[..., None] * z_s, 0.0))
    h = np.where(unc, 2 * u_f**2 / sd**2 + 4 * q.f**2 / sd**2, np.where(cens, t_zz * z_f**2, 0.0))
    h_fs = np.where(um, (4 * q.f / sd**2)[..., None] * q.s, np.where(cm, (t_zz * z_f)[..., None] * z_s, 0.0))
    h_ss = np.where(um[..., None], 4 * (q.s / sd[..., None])[..., :, None] * (q.s / sd[..., None])[..., None, :],
                    np.where(cm[..., None], t_zz[..., None, None] * z_s[..., :, None] * z_s[..., None, :], 0.0))
    if order == 1:
        return Terms(t, t_f=t_f, t_s=t_s, h=h, h_fs=h_fs, h_ss=h_ss)
    z_ff = (-u_ff - 2 * z_f * q.f - z * q.ff) / sd
    z_fs = -(z_f[..., None] * q.s + z_s * q.f[..., None] + z[..., None] * q.fs) / sd[..., None]
    t_ff = np.where(unc, 2 * q.ff / sd - 2 * q.f**2 / sd**2 + 2 * z_f**2 + 2 * z * z_ff,
                    np.where(cens, t_zz * z_f**2 + t_z * z_ff, 0.0))
    t_fs = np.where(um, 2 * q.fs / sd[..., None] - 2 * (q.f / sd**2)[..., None] * q.s
                    + 2 * z_s * z_f[..., None] + 2 * z[..., None] * z_fs,
                    np.where(cm, (t_zz * z_f)[..., None] * z_s + t_z[..., None] * z_fs, 0.0))
    r_z = -r * (z + r)
    t_zzz = 2 * r_z * (z + r) + 2 * r * (1 + r_z)
    w = np.where(unc, u_f**2 / sd**2, np.where(cens, 0.5 * t_zz * z_f**2, 0.0))
    w_f = np.where(unc, 2 * u_f * u_ff / sd**2 - 2 * u_f**2 * q.f / sd**3,
                   np.where(cens, 0.5 * t_zzz * z_f**3 + t_zz * z_f * z_ff, 0.0))
    w_s = np.where(um, (-2 * u_f**2 / sd**3)[..., None] * q.s,
                   np.where(cm, (0.5 * t_zzz * z_f**2)[..., None] * z_s + (t_zz * z_f)[..., None] * z_fs, 0.0))
    return Terms(t, t_f=t_f, t_ff=t_ff, t_s=t_s, t_fs=t_fs, w=w, w_f=w_f, w_s=w_s, h=h, h_fs=h_fs, h_ss=h_ss)


def initial_error(residual: ResidualModel, y: Array, f: Array, k: NDArray[np.int64],
                  censored: NDArray[np.bool_]) -> Array:
    """Log error parameters from residuals (moment estimates), as the per-subject fit does."""
    from ..estimate.likelihood import initial_eta

    return initial_eta(residual.kind, y, f, k, censored, len(residual.observables), residual.floor)
