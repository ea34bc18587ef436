"""Before the study: structural identifiability and optimal sampling times.

* :func:`identifiability` - which parameters the outputs can fix at all (no data);
* :func:`design_samples` - when to sample so that the parameters are estimated best.

Numerics only: no I/O and no presentation (tables and figures live in ``report/``).
"""

from __future__ import annotations

from .identifiability import IdentifiabilityResult, identifiability
from .sampling import DesignGroup, SamplingDesign, design_samples

__all__ = ["DesignGroup", "IdentifiabilityResult", "SamplingDesign", "design_samples", "identifiability"]
