"""compartments: compartmental-model identification from sparse, irregular samples.

Research use only. Results are not clinical dosing advice; dosing decisions belong to
licensed clinicians under local regulations.
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _version

try:
    __version__ = _version("compartments")
except PackageNotFoundError:  # pragma: no cover - running from a source tree
    __version__ = "0.0.0+source"

from .dosing import Dose, regimen
from .errors import CompartmentsError, DataError, FitError, TemplateError

__all__ = [
    "__version__",
    "CompartmentsError",
    "DataError",
    "Dose",
    "FitError",
    "TemplateError",
    "regimen",
]
