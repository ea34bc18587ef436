"""compartments: compartmental-model identification from sparse, irregular samples.

Research use only. Results are not clinical dosing advice; dosing decisions belong to
licensed clinicians under local regulations.

>>> from compartments import load_template
>>> load_template("one-comp-oral").parameter_names
('ka', 'ke', 'V', 'tlag')
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _version
from typing import Any

try:
    __version__ = _version("compartments")
except PackageNotFoundError:  # pragma: no cover - running from a source tree
    __version__ = "0.0.0+source"

from .dosing import Dose, regimen
from .errors import CompartmentsError, DataError, FitError, TemplateError, UsageError
from .library import list_templates, load_template

__all__ = [
    "__version__",
    "CohortResult",
    "CompartmentsError",
    "DataError",
    "Dose",
    "FitError",
    "FitResult",
    "IdentifiabilityResult",
    "PopulationResult",
    "SamplingDesign",
    "TemplateError",
    "UsageError",
    "compile_model",
    "design_samples",
    "fit",
    "fit_population",
    "identifiability",
    "list_templates",
    "load_template",
    "read_study",
    "regimen",
    "run_cohort",
    "simulate",
]


def __getattr__(name: str) -> Any:
    # Heavier pieces load on first use so that `compartments --help` starts fast.
    if name == "fit":
        from .estimate.hybrid import fit

        return fit
    if name == "FitResult":
        from .results import FitResult

        return FitResult
    if name in ("run_cohort", "CohortResult"):
        from . import cohort

        return getattr(cohort, name)
    if name in ("fit_population", "PopulationResult"):
        from . import population

        return getattr(population, name)
    if name == "read_study":
        from .study import read_study

        return read_study
    if name == "simulate":
        from .simulate import simulate

        return simulate
    if name in ("identifiability", "IdentifiabilityResult", "design_samples", "SamplingDesign"):
        from . import design

        return getattr(design, name)
    if name == "compile_model":
        from .model import compile_model

        return compile_model
    raise AttributeError(f"module 'compartments' has no attribute {name!r}")
