"""Population (mixed-effects) estimation for sparse data: SAEM and FOCE-I.

``fit_population(study, template, random=[...], covariates=[...], error=..., method=...)``
estimates typical values, between-subject variability, covariate effects and residual
error jointly, with individual (empirical Bayes) estimates for every subject, and returns
a :class:`PopulationResult`.

Modules: :mod:`.model` (typical values, random effects, covariance structure),
:mod:`.covariates`, :mod:`.residual` (per-row likelihood terms; the adapter to the error
models), :mod:`.design` and :mod:`.evaluate` (subjects in batches), :mod:`.ebe` (individual
estimates), :mod:`.foce`, :mod:`.saem`, :mod:`.likelihood` (importance sampling),
:mod:`.uncertainty`, :mod:`.diagnostics`, :mod:`.starts`, :mod:`.result`, :mod:`.fit`.

Research use only: individual estimates are not dosing advice.
"""

from .fit import fit_population
from .result import PopulationResult
from .saem import SaemSettings

__all__ = ["PopulationResult", "SaemSettings", "fit_population"]
