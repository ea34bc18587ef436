"""Fisher information of a sampling design for one subject, and the residual error it uses.

For observations ``y_j = f(t_j, θ) + ε_j`` with ``ε_j ~ N(0, σ_j²)`` and the error
parameters known, the information about θ carried by a sample at time t is

    I(t) = Σ_o J_o(t)ᵀ J_o(t) / σ_o²(t),      J_o(t) = ∂f_o(t, θ)/∂θ,

summed over the observables measured at t, and a design's information is the sum over its
samples (weighted least squares; Box & Lucas 1959, Biometrika 46:77, for constant
variance). ``r`` replicate measurements at one time count as one measurement with
variance ``σ²/r``. The variance follows the error model: additive ``σ = sd``,
proportional ``σ = cv·|f|``, combined ``σ² = sd² + cv²f²``; log-normal error
(``log y = log f + ε``) gives the same information as proportional error with
``cv = sd of ε``. A sample the model predicts as exactly 0 under proportional or
log-normal error carries no information (as in the fit, where such rows are set aside).

Numerics only: no I/O and no presentation.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..errors import UsageError

Array = NDArray[np.float64]

__all__ = ["ERROR_KINDS", "ResidualError", "resolve_error", "sample_information"]

#: Error models a design accepts.
ERROR_KINDS = ("additive", "proportional", "combined", "lognormal")
#: Default relative size of the additive SD: this fraction of the largest prediction.
DEFAULT_SD_FRACTION = 0.1
#: Default coefficient of variation of proportional error.
DEFAULT_CV = 0.1


@dataclass(frozen=True)
class ResidualError:
    """Residual error with known parameters, one value per observable.

    Attributes
    ----------
    kind : {"additive", "proportional", "combined", "lognormal"}
    sd : tuple of float
        Additive SD per observable (observable units); empty when not used.
    cv : tuple of float
        Coefficient of variation per observable (for log-normal: SD on the log scale);
        empty when not used.
    sd_assumed : bool
        The SD was not given: it is ``DEFAULT_SD_FRACTION`` of the largest prediction.

    Examples
    --------
    >>> e = ResidualError("combined", sd=(0.5,), cv=(0.2,))
    >>> e.variance(np.array([[0.0], [10.0]])).ravel().tolist()
    [0.25, 4.25]
    """

    kind: str
    sd: tuple[float, ...] = ()
    cv: tuple[float, ...] = ()
    sd_assumed: bool = False

    @property
    def uses_sd(self) -> bool:
        return self.kind in ("additive", "combined")

    @property
    def uses_cv(self) -> bool:
        return self.kind in ("proportional", "combined", "lognormal")

    def variance(self, f: Array) -> Array:
        """σ² for predictions ``f`` of shape (..., m)."""
        out = np.zeros_like(f, dtype=float)
        if self.uses_sd:
            out = out + np.asarray(self.sd) ** 2
        if self.uses_cv:
            out = out + (np.asarray(self.cv) * f) ** 2
        return out

    def parameter_names(self, observed: Sequence[str]) -> tuple[str, ...]:
        """``sd_<observable>`` and ``cv_<observable>`` in observable order."""
        kinds = [k for k, used in (("sd", self.uses_sd), ("cv", self.uses_cv)) if used]
        return tuple(f"{k}_{o}" for o in observed for k in kinds)

    def parameter_values(self) -> Array:
        """The error parameters in the order of :meth:`parameter_names`."""
        out = []
        for i in range(max(len(self.sd), len(self.cv))):
            if self.uses_sd:
                out.append(self.sd[i])
            if self.uses_cv:
                out.append(self.cv[i])
        return np.array(out, dtype=float)

    def variance_derivatives(self, f: Array) -> Array:
        """∂σ²/∂(error parameter): shape (..., m, E), in parameter order."""
        m = f.shape[-1]
        per = int(self.uses_sd) + int(self.uses_cv)
        out = np.zeros(f.shape + (m * per,))
        for o in range(m):
            k = o * per
            if self.uses_sd:
                out[..., o, k] = 2 * self.sd[o]
                k += 1
            if self.uses_cv:
                out[..., o, k] = 2 * self.cv[o] * f[..., o] ** 2
        return out

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "sd": list(self.sd), "cv": list(self.cv), "sd_assumed": self.sd_assumed}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> ResidualError:
        return cls(data["kind"], tuple(data.get("sd", ())), tuple(data.get("cv", ())),
                   bool(data.get("sd_assumed", False)))


def _per_observable(value: float | Mapping[str, float] | None, observed: Sequence[str], what: str,
                    default: Sequence[float]) -> tuple[tuple[float, ...], bool]:
    if value is None:
        return tuple(float(v) for v in default), True
    if isinstance(value, Mapping):
        unknown = [k for k in value if k not in observed]
        if unknown:
            raise UsageError(f"{what}={{{unknown[0]!r}: ...}}: not an observed output; observed: {', '.join(observed)}")
        missing = [o for o in observed if o not in value]
        if missing:
            raise UsageError(f"{what}= gives no value for {', '.join(missing)}")
        values = [value[o] for o in observed]
    else:
        values = [value] * len(observed)
    out = []
    for v in values:
        try:
            x = float(v)
        except (TypeError, ValueError):
            raise UsageError(f"{what}={v!r} is not a number") from None
        if not (np.isfinite(x) and x > 0):
            raise UsageError(f"{what}={v!r} must be a positive number")
        out.append(x)
    return tuple(out), False


def resolve_error(error: Any, observed: Sequence[str], peak: Sequence[float],
                  sd: float | Mapping[str, float] | None = None,
                  cv: float | Mapping[str, float] | None = None) -> ResidualError:
    """The residual error a design assumes.

    ``error`` is a name (``"additive"``, ``"proportional"``, ``"combined"``,
    ``"lognormal"``) or an error-model object with such a ``name``. ``sd`` and ``cv`` are
    numbers or mappings by observable; an SD not given is ``DEFAULT_SD_FRACTION`` of the
    observable's largest prediction ``peak`` (said so in reports), a CV not given is
    ``DEFAULT_CV``.

    Examples
    --------
    >>> resolve_error("additive", ["concentration"], [2.0]).sd
    (0.2,)
    """
    name = error if isinstance(error, str) else getattr(error, "name", None)
    if name not in ERROR_KINDS:
        shown = error if isinstance(error, str) else type(error).__name__
        raise UsageError(f"error={shown!r} is not an error model a design takes; use one of {', '.join(ERROR_KINDS)}")
    sd_values: tuple[float, ...] = ()
    cv_values: tuple[float, ...] = ()
    assumed = False
    if name in ("additive", "combined"):
        sd_values, assumed = _per_observable(sd, observed, "sd", [DEFAULT_SD_FRACTION * abs(p) for p in peak])
        if any(v <= 0 for v in sd_values):
            raise UsageError("the predictions are 0 throughout the window, so no default SD exists; give sd=")
    elif sd is not None:
        raise UsageError(f"sd= does not apply to {name} error; use cv=")
    if name in ("proportional", "combined", "lognormal"):
        cv_values, _ = _per_observable(cv, observed, "cv", [DEFAULT_CV] * len(observed))
    elif cv is not None:
        raise UsageError(f"cv= does not apply to {name} error; use sd=")
    return ResidualError(name, sd_values, cv_values, assumed)


def sample_information(J: Array, f: Array, error: ResidualError, replicates: Array | float = 1.0) -> Array:
    """Information of samples: ``Σ_o r·J_oᵀJ_o/σ_o²``.

    Parameters
    ----------
    J : (..., m, p) array
        Sensitivities ∂f/∂θ of the m observables.
    f : (..., m) array
        Predictions.
    error : ResidualError
    replicates : array broadcastable to (...)
        Measurements at each time.

    Returns
    -------
    (..., p, p) array

    Examples
    --------
    >>> e = ResidualError("additive", sd=(2.0,))
    >>> sample_information(np.array([[[1.0, 2.0]]]), np.array([[5.0]]), e).tolist()
    [[[0.25, 0.5], [0.5, 1.0]]]
    """
    var = error.variance(f)
    with np.errstate(divide="ignore"):
        w = np.where(var > 0, 1.0 / np.where(var > 0, var, 1.0), 0.0)
    w = w * np.asarray(replicates, dtype=float)[..., None]
    return np.einsum("...mi,...m,...mj->...ij", J, w, J)
