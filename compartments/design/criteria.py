"""Design criteria as objects: what "best" means for an information matrix M.

Each criterion gives the value to maximise, its *sensitivity function* — the directional
derivative toward a one-point (elementary) design, which the general equivalence theorem
of Kiefer & Wolfowitz (1960, Can J Math 12:363) bounds at an optimum — the bound, and
the efficiency of one design relative to another:

* D-optimality: ``log det M``; sensitivity ``d(x) = tr(M⁻¹ I(x))`` ≤ P, the number of
  parameters; efficiency ``(det M₁/det M₀)^{1/P}``; a design with ``max d = d̄`` is at
  least ``P/d̄`` efficient (Atwood 1969, Ann Math Stat 40:1570: by the arithmetic–geometric
  mean inequality on the eigenvalues of ``M⁻¹M*``).
* Ds-optimality for a subset s of the parameters: ``log det M − log det M_rr`` (r the
  others); ``d(x) = tr(M⁻¹I) − tr(M_rr⁻¹I_rr)`` ≤ |s|; efficiency with the power 1/|s|; at
  least ``exp(1 − d̄/|s|)`` efficient (concavity).
* A-optimality on the relative scale: ``−tr(W M⁻¹)`` with ``W = diag(1/θ²)`` (the sum of
  squared relative standard errors); ``d(x) = tr(M⁻¹WM⁻¹ I(x))`` ≤ ``tr(W M⁻¹)``;
  efficiency ``tr(W M₀⁻¹)/tr(W M₁⁻¹)``; at least ``2 − d̄/tr(WM⁻¹)`` efficient (convexity).

Matrices are normalised per elementary design (per sample, or per subject) in the
sensitivity function. Over several parameter draws (a robust, ED-optimal design) the
value and the sensitivity function are the means over draws.

Numerics only: no I/O and no presentation.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..errors import UsageError

Array = NDArray[np.float64]

__all__ = ["AOptimal", "Criterion", "DOptimal", "DsOptimal", "criterion"]

_SINGULAR = -np.inf


def _logdet(M: Array) -> Array:
    sign, value = np.linalg.slogdet(M)
    return np.where(sign > 0, value, _SINGULAR)


class Criterion:
    """The interface (see the module docstring)."""

    name: str = ""

    def value(self, M: Array) -> Array:
        """Value to maximise, (...,) for M of shape (..., P, P); −inf when singular."""
        raise NotImplementedError

    def sensitivity(self, M: Array, info: Array) -> Array:
        """Sensitivity function at elementary designs info (..., P, P) for the normalised M."""
        raise NotImplementedError

    def bound(self, M: Array) -> float:
        """The equivalence-theorem bound of the sensitivity function at an optimum."""
        raise NotImplementedError

    def efficiency(self, value: float, reference: float, size: int) -> float:
        """Efficiency of a design with criterion value ``value`` relative to ``reference``
        (``size``: the number of parameters in the information matrix)."""
        raise NotImplementedError

    def efficiency_bound(self, maximum: float, bound: float) -> float:
        """Lower bound of the efficiency against the best design, from ``max d``."""
        raise NotImplementedError

    def describe(self) -> str:
        return self.name


@dataclass(frozen=True)
class DOptimal(Criterion):
    """log det of the information matrix.

    Examples
    --------
    >>> c = DOptimal()
    >>> M = np.diag([2.0, 3.0])
    >>> float(c.value(M)), float(c.sensitivity(M, M)), c.bound(M)
    (1.791759469228055, 2.0, 2.0)
    """

    name: str = "D"

    def value(self, M: Array) -> Array:
        return _logdet(M)

    def sensitivity(self, M: Array, info: Array) -> Array:
        return np.einsum("ij,...ji->...", np.linalg.inv(M), info)

    def bound(self, M: Array) -> float:
        return float(M.shape[-1])

    def efficiency(self, value: float, reference: float, size: int) -> float:
        return float(np.exp((value - reference) / size))

    def efficiency_bound(self, maximum: float, bound: float) -> float:
        return float(min(1.0, bound / maximum)) if maximum > 0 else 0.0


@dataclass(frozen=True)
class DsOptimal(Criterion):
    """log det of the information about a subset, the others being nuisance parameters."""

    interest: tuple[int, ...] = ()
    labels: tuple[str, ...] = ()
    name: str = "Ds"

    def _rest(self, P: int) -> list[int]:
        return [i for i in range(P) if i not in self.interest]

    def value(self, M: Array) -> Array:
        rest = self._rest(M.shape[-1])
        total = _logdet(M)
        if not rest:
            return total
        return total - _logdet(M[..., rest, :][..., :, rest])

    def sensitivity(self, M: Array, info: Array) -> Array:
        rest = self._rest(M.shape[-1])
        d = np.einsum("ij,...ji->...", np.linalg.inv(M), info)
        if rest:
            d = d - np.einsum("ij,...ji->...", np.linalg.inv(M[np.ix_(rest, rest)]), info[..., rest, :][..., :, rest])
        return d

    def bound(self, M: Array) -> float:
        return float(len(self.interest))

    def efficiency(self, value: float, reference: float, size: int) -> float:
        return float(np.exp((value - reference) / len(self.interest)))

    def efficiency_bound(self, maximum: float, bound: float) -> float:
        return float(min(1.0, np.exp(1.0 - maximum / bound))) if bound > 0 else 0.0

    def describe(self) -> str:
        return "Ds (" + ", ".join(self.labels) + ")"


@dataclass(frozen=True)
class AOptimal(Criterion):
    """Minus the sum of squared relative standard errors, ``−tr(W M⁻¹)``, ``W = diag(1/θ²)``."""

    scale: tuple[float, ...] = ()
    name: str = "A"

    def _W(self) -> Array:
        return np.diag(1.0 / np.asarray(self.scale, dtype=float) ** 2)

    def value(self, M: Array) -> Array:
        sign, _ = np.linalg.slogdet(M)
        ok = sign > 0
        safe = np.where(ok[..., None, None], M, np.eye(M.shape[-1]))
        out = -np.einsum("ij,...ji->...", self._W(), np.linalg.inv(safe))
        return np.where(ok, out, _SINGULAR)

    def sensitivity(self, M: Array, info: Array) -> Array:
        Mi = np.linalg.inv(M)
        return np.einsum("ij,...ji->...", Mi @ self._W() @ Mi, info)

    def bound(self, M: Array) -> float:
        return float(np.trace(self._W() @ np.linalg.inv(M)))

    def efficiency(self, value: float, reference: float, size: int) -> float:
        return float(reference / value) if value < 0 else 0.0

    def efficiency_bound(self, maximum: float, bound: float) -> float:
        return float(min(1.0, max(0.0, 2.0 - maximum / bound))) if bound > 0 else 0.0


def criterion(spec: str | Criterion, names: Sequence[str], scale: Sequence[float],
              interest: Sequence[str] | None = None) -> Criterion:
    """A criterion object from a name (``"D"``, ``"A"``, ``"Ds"``) or an object.

    ``names`` are the parameters in information-matrix order, ``scale`` their values (for
    the relative scale of A-optimality), ``interest`` the subset for Ds.
    """
    if isinstance(spec, Criterion):
        return spec
    key = str(spec).strip().upper()
    if key == "D":
        if interest:
            raise UsageError("interest= applies to criterion='Ds' only")
        return DOptimal()
    if key == "A":
        if any(v == 0 for v in scale):
            raise UsageError("criterion='A' uses relative standard errors and needs non-zero parameter values")
        return AOptimal(scale=tuple(float(abs(v)) for v in scale))
    if key == "DS":
        if not interest:
            raise UsageError("criterion='Ds' needs interest= (the parameters that matter), e.g. interest=['ka']")
        unknown = [k for k in interest if k not in names]
        if unknown:
            raise UsageError(f"interest={unknown[0]!r} is not an estimated parameter; estimated: {', '.join(names)}")
        idx = tuple(sorted({list(names).index(k) for k in interest}))
        return DsOptimal(interest=idx, labels=tuple(names[i] for i in idx))
    raise UsageError(f"criterion={spec!r} is unknown; use 'D', 'A' or 'Ds'")
