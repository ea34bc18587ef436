"""The population model: typical values, covariate effects, between-subject variability.

Subject ``i``'s parameters on their *individual scale* ``ψ`` (log for a log-normal random
effect and for a log-scaled parameter without one; the natural scale for an additive
random effect and for a parameter the template keeps on the natural scale) are

    ψ_i = m(β, c_i) + E η_i,        η_i ~ N(0, Ω),

with ``m_k = μ_k + Σ log factor_k(c_i)`` on the log scale and ``m_k = μ_k · Π factor_k(c_i)``
on the natural scale (:mod:`.covariates`), ``E`` the columns of the parameters that carry a
random effect, and ``θ_i = exp(ψ_i)`` or ``ψ_i``. A log-normal effect gives
``θ_i = θ · exp(η_i)``, an additive one ``θ_i = θ + η_i``.

``Ω`` is block diagonal (one block per group of correlated effects; "diagonal" is one
block per effect, "full" one block) and is estimated through its Cholesky factor ``L``
(``Ω = L Lᵀ``) with the log of the diagonal of ``L``, so every value of the estimation
vector is a valid covariance.

The estimation vector is ``x = [μ (p) | β (effects) | L (Cholesky entries) | s (log error
parameters)]``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..errors import UsageError
from ..model import Model
from .covariates import CovariateEffect
from .residual import ResidualModel

Array = NDArray[np.float64]

KINDS = ("lognormal", "normal")


def parse_random(random: Sequence[str] | Mapping[str, str], names: Sequence[str]) -> dict[str, str]:
    """``random=["ka", "V"]`` or ``{"ke": "normal", "V": "lognormal"}`` → name → kind.

    Examples
    --------
    >>> parse_random(["ka", "V"], ["ka", "ke", "V"])
    {'ka': 'lognormal', 'V': 'lognormal'}
    >>> parse_random({"ke": "normal"}, ["ka", "ke", "V"])
    {'ke': 'normal'}
    """
    if isinstance(random, str):
        raise UsageError(f"random= takes a list of parameter names, e.g. [{random!r}], not a string")
    items = dict(random) if isinstance(random, Mapping) else {str(n): "lognormal" for n in random}
    out: dict[str, str] = {}
    for n, kind in items.items():
        if n not in names:
            raise UsageError(f"random: {n!r} is not an estimated parameter; estimated are {', '.join(names)}")
        if kind not in KINDS:
            raise UsageError(f"random: {n} = {kind!r}; a random effect is 'lognormal' (θ·exp(η)) or 'normal' (θ + η)")
        out[n] = kind
    if not out:
        raise UsageError("random= is empty: a population model needs at least one parameter with between-subject "
                         "variability, e.g. random=['V']")
    return out


def parse_blocks(variability: Any, random: Sequence[str]) -> tuple[tuple[int, ...], ...]:
    """Blocks of correlated random effects, as indices into ``random``.

    ``"diagonal"``: no correlations; ``"full"``: all correlated; a list of lists of names:
    those blocks (effects not named stay uncorrelated).

    Examples
    --------
    >>> parse_blocks([["ka", "V"]], ["ka", "ke", "V"])
    ((0, 2), (1,))
    """
    q = len(random)
    if variability == "diagonal":
        return tuple((j,) for j in range(q))
    if variability == "full":
        return (tuple(range(q)),)
    if isinstance(variability, str) or not isinstance(variability, Sequence):
        raise UsageError(f"variability= is 'diagonal', 'full' or a list of blocks of names, got {variability!r}")
    used: list[int] = []
    blocks: list[tuple[int, ...]] = []
    for block in variability:
        if isinstance(block, str):
            block = [block]
        idx = []
        for n in block:
            if n not in random:
                raise UsageError(f"variability: {n!r} has no random effect (random effects: {', '.join(random)})")
            j = list(random).index(n)
            if j in used:
                raise UsageError(f"variability: {n!r} is in two blocks")
            used.append(j)
            idx.append(j)
        blocks.append(tuple(sorted(idx)))
    blocks += [(j,) for j in range(q) if j not in used]
    return tuple(sorted(blocks))


@dataclass(frozen=True)
class Unpacked:
    """The estimation vector split into its parts."""

    mu: Array
    beta: Array
    chol: Array
    s: Array


@dataclass(frozen=True, eq=False)
class PopulationModel:
    """What is estimated and how subjects' parameters are built from it.

    Attributes
    ----------
    model : Model
    free : tuple of int
        Template indices of the estimated parameters.
    base : (P,) array
        Every template parameter; held (fixed) ones keep these values.
    random : tuple of int
        Indices into ``free`` of the parameters with a random effect (in η order).
    kinds : tuple of str
        ``"lognormal"`` or ``"normal"`` per random effect.
    blocks : tuple of tuple of int
        Blocks of ``Ω`` (indices into ``random``).
    effects : tuple of CovariateEffect
    residual : ResidualModel
    """

    model: Model
    free: tuple[int, ...]
    base: Array
    random: tuple[int, ...]
    kinds: tuple[str, ...]
    blocks: tuple[tuple[int, ...], ...]
    effects: tuple[CovariateEffect, ...]
    residual: ResidualModel
    log_scale: NDArray[np.bool_] = field(init=False)

    def __post_init__(self) -> None:
        ps = self.model.template.parameters
        kind = dict(zip(self.random, self.kinds, strict=True))
        lg = [kind[j] == "lognormal" if j in kind else bool(ps[i].log) for j, i in enumerate(self.free)]
        object.__setattr__(self, "log_scale", np.array(lg, dtype=bool))

    # -- names and sizes ------------------------------------------------------------------
    @property
    def names(self) -> tuple[str, ...]:
        """Estimated parameters (typical values)."""
        return tuple(self.model.parameter_names[i] for i in self.free)

    @property
    def random_names(self) -> tuple[str, ...]:
        return tuple(self.names[j] for j in self.random)

    @property
    def p(self) -> int:
        return len(self.free)

    @property
    def q(self) -> int:
        return len(self.random)

    @property
    def n_beta(self) -> int:
        return sum(e.size for e in self.effects)

    @property
    def chol_index(self) -> tuple[tuple[int, int], ...]:
        """(row, column) in Ω of each Cholesky entry, block by block, row-major lower triangle."""
        out = []
        for b in self.blocks:
            for r in range(len(b)):
                for c in range(r + 1):
                    out.append((b[r], b[c]))
        return tuple(out)

    @property
    def n_chol(self) -> int:
        return len(self.chol_index)

    @property
    def n_error(self) -> int:
        return self.residual.n_params

    @property
    def size(self) -> int:
        return self.p + self.n_beta + self.n_chol + self.n_error

    @property
    def effect_labels(self) -> tuple[str, ...]:
        return tuple(lab for e in self.effects for lab in e.labels)

    @property
    def variance_labels(self) -> tuple[str, ...]:
        """``var(V)`` on the diagonal and ``cov(ka,V)`` off it, in Cholesky-entry order."""
        rn = self.random_names
        return tuple(f"var({rn[r]})" if r == c else f"cov({rn[c]},{rn[r]})" for r, c in self.chol_index)

    @property
    def slices(self) -> tuple[slice, slice, slice, slice]:
        a = self.p
        b = a + self.n_beta
        c = b + self.n_chol
        return slice(0, a), slice(a, b), slice(b, c), slice(c, self.size)

    def unpack(self, x: Array) -> Unpacked:
        sm, sb, sl, ss = self.slices
        return Unpacked(x[sm], x[sb], x[sl], x[ss])

    # -- typical values and covariates -----------------------------------------------------
    def typical(self, x: Array, n_subjects: int) -> tuple[Array, Array]:
        """``m`` (N, p) and ``∂m/∂(μ, β)`` (N, p, p + n_beta)."""
        u = self.unpack(x)
        p, nb = self.p, self.n_beta
        logf = np.zeros((n_subjects, p))
        dlogf = np.zeros((n_subjects, p, nb))
        j0 = 0
        names = self.names
        for e in self.effects:
            k = names.index(e.parameter)
            lf, dlf = e.log_factor(u.beta[j0:j0 + e.size])
            logf[:, k] += lf
            dlogf[:, k, j0:j0 + e.size] = dlf
            j0 += e.size
        m = np.empty((n_subjects, p))
        dm = np.zeros((n_subjects, p, p + nb))
        lg = self.log_scale
        fac = np.exp(logf)
        m[:, lg] = u.mu[lg] + logf[:, lg]
        m[:, ~lg] = u.mu[~lg] * fac[:, ~lg]
        idx = np.arange(p)
        dm[:, idx, idx] = np.where(lg, 1.0, fac)
        dm[:, :, p:] = np.where(lg[None, :, None], dlogf, (u.mu * fac)[:, :, None] * dlogf)
        return m, dm

    def chol(self, x: Array) -> Array:
        """Lower-triangular L with Ω = L Lᵀ."""
        q = self.q
        L = np.zeros((q, q))
        vals = self.unpack(x).chol
        for v, (r, c) in zip(vals, self.chol_index, strict=True):
            L[r, c] = np.exp(v) if r == c else v
        return L

    def omega(self, x: Array) -> Array:
        L = self.chol(x)
        return L @ L.T

    def domega(self, x: Array) -> Array:
        """∂Ω/∂(Cholesky entries), shape (n_chol, q, q)."""
        L = self.chol(x)
        out = np.zeros((self.n_chol, self.q, self.q))
        for j, (r, c) in enumerate(self.chol_index):
            dL = np.zeros_like(L)
            dL[r, c] = L[r, c] if r == c else 1.0
            out[j] = dL @ L.T + L @ dL.T
        return out

    def chol_entries(self, omega: Array) -> Array:
        """Cholesky entries (log diagonal) of a covariance, block by block."""
        L = np.zeros_like(omega)
        for b in self.blocks:
            sub = omega[np.ix_(b, b)]
            L[np.ix_(b, b)] = np.linalg.cholesky(sub + 1e-12 * np.eye(len(b)))
        return np.array([np.log(L[r, c]) if r == c else L[r, c] for r, c in self.chol_index])

    def block_mask(self) -> NDArray[np.bool_]:
        """(q, q) True where Ω may be nonzero."""
        q = self.q
        mask = np.zeros((q, q), bool)
        for b in self.blocks:
            mask[np.ix_(b, b)] = True
        return mask

    # -- individual parameters -------------------------------------------------------------
    def psi(self, m: Array, eta: Array) -> Array:
        """ψ = m + E η (broadcast over leading axes)."""
        out = np.array(m, dtype=float, copy=True)
        out[..., list(self.random)] += eta
        return out

    def theta(self, psi: Array) -> tuple[Array, Array]:
        """Full natural parameter vectors (B, P) and ∂θ_free/∂ψ (B, p)."""
        B = psi.shape[0]
        th_free = np.where(self.log_scale, np.exp(np.minimum(psi, 700.0)), psi)
        theta = np.repeat(self.base[None, :], B, axis=0)
        theta[:, list(self.free)] = th_free
        return theta, np.where(self.log_scale, th_free, 1.0)

    def natural(self, psi: Array) -> Array:
        """Estimated parameters on the natural scale (..., p)."""
        return np.where(self.log_scale, np.exp(np.minimum(psi, 700.0)), psi)

    def to_scale(self, theta_free: Array) -> Array:
        """Natural values → individual scale."""
        t = np.asarray(theta_free, dtype=float)
        return np.where(self.log_scale, np.log(np.maximum(t, 1e-300)), t)

    # -- bounds ----------------------------------------------------------------------------
    def mu_bounds(self) -> list[tuple[float, float]]:
        ps = self.model.template.parameters
        out = []
        for j, i in enumerate(self.free):
            lo, hi = ps[i].lower, ps[i].upper
            if self.log_scale[j]:
                out.append((float(np.log(max(lo, 1e-300))), float(np.log(hi))))
            else:
                out.append((float(lo), float(hi)))
        return out

    def bounds(self) -> list[tuple[float, float]]:
        """Bounds of every entry of x (typical values inside the template's range)."""
        out = self.mu_bounds()
        for e in self.effects:
            out += e.bounds()
        out += [(-12.0, 5.0) if r == c else (-np.inf, np.inf) for r, c in self.chol_index]
        out += [(-25.0, 10.0)] * self.n_error
        return out

    def pack(self, typical: Mapping[str, float], omega: Array, error: Mapping[str, float],
             effects: Mapping[str, float] | None = None) -> Array:
        """The estimation vector from natural values (typical values, Ω, error parameters,
        effects as reported: categorical factors, other forms β)."""
        x = np.zeros(self.size)
        sm, sb, sl, ss = self.slices
        x[sm] = self.to_scale(np.array([typical[n] for n in self.names], dtype=float))
        eff = dict(effects or {})
        j = sb.start
        for e in self.effects:
            for lab in e.labels:
                v = float(eff.get(lab, 1.0 if e.form == "categorical" else 0.0))
                x[j] = np.log(v) if e.form == "categorical" else v
                j += 1
        x[sl] = self.chol_entries(np.asarray(omega, dtype=float))
        x[ss] = np.log([error[n] for n in self.residual.names])
        return x

    def reported_effects(self, x: Array) -> dict[str, float]:
        u = self.unpack(x)
        out: dict[str, float] = {}
        j0 = 0
        for e in self.effects:
            vals = e.reported(u.beta[j0:j0 + e.size])
            out.update(zip(e.labels, map(float, vals), strict=True))
            j0 += e.size
        return out

    def describe(self) -> dict[str, Any]:
        """A plain record of the model's structure (for results and reports)."""
        return {
            "parameters": list(self.names),
            "random": {n: k for n, k in zip(self.random_names, self.kinds, strict=True)},
            "blocks": [[self.random_names[j] for j in b] for b in self.blocks],
            "covariates": [{"parameter": e.parameter, "column": e.column, "form": e.form,
                            "reference": e.reference, "levels": list(e.levels)} for e in self.effects],
            "fixed": {self.model.parameter_names[i]: float(self.base[i])
                      for i in range(self.model.n_params) if i not in self.free},
            "error": self.residual.kind,
        }
