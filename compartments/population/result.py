"""The result of a population fit: one record from estimator to JSON, run directory and report.

:class:`PopulationResult` holds every number; :meth:`PopulationResult.to_dict` turns it into
plain JSON types (tables as ``{"columns": [...], "rows": [[...], ...]}``) and
:meth:`PopulationResult.from_dict` reads that back. Presentation reads it and never
recomputes estimates.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

Array = NDArray[np.float64]

#: Version of the layout of :meth:`PopulationResult.to_dict`.
SCHEMA = 1
CAUTION = ("Research use only: population estimates and individual estimates are not dosing advice; "
           "dosing decisions belong to licensed clinicians under local regulations.")


@dataclass(frozen=True)
class PopulationResult:
    """Everything a population fit produced.

    Attributes
    ----------
    template, method, error_model : str
        ``method`` is ``"saem"`` or ``"foce"``.
    typical : dict
        Typical value of every estimated parameter, natural scale, at the covariates'
        reference values.
    variability_matrix : (q, q) array and ``random`` (names): the variance-covariance of the
        random effects (log scale for log-normal effects); :attr:`variability` gives it as a
        labelled DataFrame. ``random_kinds`` says "lognormal" or "normal" per effect.
    effects : dict
        Covariate effects, ``"V:weight"`` (the exponent of a power effect, β of an
        exponential or linear one) or ``"V:sex=F"`` (a categorical level's factor).
    error_parameters : dict
        As in :class:`compartments.results.FitResult` (``sd_...``, ``cv_...``, ``sdlog_...``).
    se, rse, ci : dict
        Keyed by the names above and ``"var(V)"`` / ``"cov(ka,V)"`` for the variability.
    covariance, correlation : arrays over ``estimate_labels`` (the estimation vector:
        log typical values, effects, Cholesky entries, log error parameters).
    covariance_method : str
    objective : float
        −2 log-likelihood with all constants: importance sampling for SAEM (Monte Carlo SE
        in ``objective_se``), the FOCE-I approximation for FOCE (``objective_se`` nan).
    aic, bic : float
        ``objective + 2k`` and ``objective + k log(n_obs)``, k = ``n_parameters``.
    individual : DataFrame
        One row per subject: individual parameters (natural scale), their conditional SDs
        (``sd_<name>``, delta method from the FOCE-I conditional covariance) and the random
        effects (``random_effect_<name>``).
    shrinkage : dict
        η-shrinkage per random effect and ``"residual"`` (ε-shrinkage), in %.
    predictions : DataFrame
        One row per observation: subject, time, observable, value, censored,
        population_prediction, individual_prediction, iwres, cwres, npde.
    warnings : tuple of str
    converged : bool
    """

    template: str
    method: str
    error_model: str
    typical: Mapping[str, float]
    random: tuple[str, ...]
    random_kinds: tuple[str, ...]
    variability_matrix: Array
    effects: Mapping[str, float]
    error_parameters: Mapping[str, float]
    se: Mapping[str, float]
    rse: Mapping[str, float]
    ci: Mapping[str, tuple[float, float]]
    estimate_labels: tuple[str, ...]
    estimate_vector: Array
    covariance: Array
    correlation: Array
    covariance_method: str
    objective: float
    objective_se: float
    aic: float
    bic: float
    n_parameters: int
    n_subjects: int
    n_obs: int
    individual: pd.DataFrame
    shrinkage: Mapping[str, float]
    predictions: pd.DataFrame
    warnings: tuple[str, ...]
    converged: bool
    iterations: int
    seed: int
    wall_time: float
    units: Mapping[str, str] = field(default_factory=dict)
    model: Mapping[str, Any] = field(default_factory=dict)
    starts: Mapping[str, Any] = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    trace: Array = field(default_factory=lambda: np.zeros((0, 0)))
    trace_labels: tuple[str, ...] = ()
    details: Mapping[str, Any] = field(default_factory=dict)
    versions: Mapping[str, str] = field(default_factory=dict)

    @property
    def variability(self) -> pd.DataFrame:
        """Variance-covariance of the random effects, labelled by parameter."""
        return pd.DataFrame(self.variability_matrix, index=list(self.random), columns=list(self.random))

    @property
    def cv(self) -> dict[str, float]:
        """Between-subject variability as CV % (log-normal: √(e^{ω²} − 1); additive: ω/θ)."""
        out = {}
        for j, (n, k) in enumerate(zip(self.random, self.random_kinds, strict=True)):
            w2 = float(self.variability_matrix[j, j])
            out[n] = 100 * math.sqrt(math.expm1(w2)) if k == "lognormal" else 100 * math.sqrt(w2) / abs(self.typical[n])
        return out

    # -- record ----------------------------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """Plain JSON types; see the module docstring for the table layout."""
        out: dict[str, Any] = {"kind": "population", "schema": SCHEMA}
        for f in fields(self):
            v = getattr(self, f.name)
            out[f.name] = _plain(v)
        out["caution"] = CAUTION
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> PopulationResult:
        """The result written by :meth:`to_dict`."""
        kw: dict[str, Any] = {}
        for f in fields(cls):
            if f.name not in d:
                continue
            v = d[f.name]
            if f.name in ("individual", "predictions"):
                kw[f.name] = _frame(v, index=f.name == "individual")
            elif f.name in ("variability_matrix", "estimate_vector", "covariance", "correlation", "trace"):
                kw[f.name] = np.array(_unnan(v), dtype=float)
            elif f.name == "ci":
                kw[f.name] = {k: (_num(a), _num(b)) for k, (a, b) in v.items()}
            elif f.name in ("random", "random_kinds", "estimate_labels", "warnings", "notes", "trace_labels"):
                kw[f.name] = tuple(v)
            elif f.name in ("typical", "effects", "error_parameters", "se", "rse", "shrinkage"):
                kw[f.name] = {k: _num(x) for k, x in v.items()}
            elif f.name in ("objective", "objective_se", "aic", "bic", "wall_time"):
                kw[f.name] = _num(v)
            else:
                kw[f.name] = v
        return cls(**kw)

    def summary(self) -> str:
        """A plain-text summary (no terminal markup)."""
        lines = [f"Population fit of {self.template} ({self.method.upper()}, {self.error_model} error): "
                 f"{self.n_subjects} subjects, {self.n_obs} observations"]
        se = f" ± {self.objective_se:.2f} (Monte Carlo SE)" if np.isfinite(self.objective_se) else ""
        lines.append(f"−2LL {self.objective:.3f}{se}; AIC {self.aic:.3f}; BIC {self.bic:.3f}; "
                     f"{'converged' if self.converged else 'NOT converged'} after {self.iterations} iterations")
        lines.append("Typical values:")
        for n, v in self.typical.items():
            unit = self.units.get(n, "")
            lines.append(f"  {n} = {v:.4g} {unit}".rstrip() + _se(self, n))
        if self.effects:
            lines.append("Covariate effects:")
            lines += [f"  {n} = {v:.4g}" + _se(self, n) for n, v in self.effects.items()]
        lines.append("Between-subject variability:")
        cv = self.cv
        for j, n in enumerate(self.random):
            lines.append(f"  {n}: variance {self.variability_matrix[j, j]:.4g} (CV {cv[n]:.1f} %), "
                         f"shrinkage {self.shrinkage.get(n, float('nan')):.0f} %")
        lines.append("Residual error: " + ", ".join(f"{n} = {v:.4g}" for n, v in self.error_parameters.items()))
        lines += [f"Warning: {w}" for w in self.warnings]
        lines.append(CAUTION)
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()


def _se(r: PopulationResult, n: str) -> str:
    s = r.se.get(n, float("nan"))
    if not np.isfinite(s):
        return ""
    lo, hi = r.ci[n]
    return f" (SE {s:.3g}, RSE {r.rse[n]:.1f} %, 95 % CI {lo:.4g} to {hi:.4g})"


def _num(x: Any) -> float:
    return float("nan") if x is None else float(x)


def _unnan(v: Any) -> Any:
    if isinstance(v, list):
        return [_unnan(a) for a in v]
    return float("nan") if v is None else v


def _plain(v: Any) -> Any:
    if isinstance(v, pd.DataFrame):
        frame = v.reset_index() if v.index.name else v
        return {"columns": [str(c) for c in frame.columns],
                "rows": [[_plain(a) for a in row] for row in frame.itertuples(index=False, name=None)],
                "index": v.index.name}
    if isinstance(v, np.ndarray):
        return _plain(v.tolist())
    if isinstance(v, Mapping):
        return {str(k): _plain(a) for k, a in v.items()}
    if isinstance(v, (list, tuple)):
        return [_plain(a) for a in v]
    if isinstance(v, (np.bool_, bool)):
        return bool(v)
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        f = float(v)
        return f if math.isfinite(f) else None
    return v


def _frame(d: Mapping[str, Any], index: bool) -> pd.DataFrame:
    rows = [[float("nan") if a is None else a for a in r] for r in d["rows"]]
    frame = pd.DataFrame(rows, columns=d["columns"])
    if "censored" in frame.columns:
        frame["censored"] = frame["censored"].astype(bool)
    name = d.get("index")
    if index and name:
        frame = frame.set_index(name)
    return frame
