"""Model comparison for one subject: AIC, AICc, BIC and Akaike weights.

Akaike weights ``w_i = exp(−Δ_i/2) / Σ exp(−Δ_j/2)`` with ``Δ_i = AIC_i − min AIC``
(Burnham & Anderson, Model Selection and Multimodel Inference, 2nd ed., 2002, §2.9).
Failed fits take no part and are listed.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

from .results import FitResult

CRITERIA = ("aic", "aicc", "bic")


@dataclass(frozen=True)
class ModelComparison:
    """Comparison of the models fitted to one subject."""

    subject: str
    criterion: str
    models: tuple[str, ...]  # successful fits, in the order given
    aic: dict[str, float]
    aicc: dict[str, float]
    bic: dict[str, float]
    delta: dict[str, float]  # criterion − best
    weights: dict[str, float]  # Akaike-type weights on the chosen criterion
    preferred: str | None
    runner_up: str | None
    margin: float  # criterion difference between the runner-up and the preferred model
    failed: dict[str, str] = field(default_factory=dict)  # model -> reason

    @property
    def evidence(self) -> str:
        """Plain words for the margin (Burnham & Anderson 2002, §2.6: Δ ≤ 2 substantial
        support, 4–7 considerably less, > 10 essentially none)."""
        if self.preferred is None:
            return "no model could be fitted"
        if self.runner_up is None:
            return "only one model was fitted"
        m = self.margin
        if m <= 2:
            return "the data barely distinguish these models"
        if m <= 7:
            return "moderate preference"
        if m <= 10:
            return "strong preference"
        return "decisive preference"


def compare_models(fits: Sequence[FitResult], criterion: str = "aic") -> ModelComparison:
    """Compare fits of several models to the same subject.

    Examples
    --------
    >>> from types import SimpleNamespace as S
    >>> a = S(subject="1", template="a", ok=True, aic=10.0, aicc=11.0, bic=12.0, message="")
    >>> b = S(subject="1", template="b", ok=True, aic=12.0, aicc=14.0, bic=15.0, message="")
    >>> c = compare_models([a, b])
    >>> c.preferred, round(c.weights["a"], 4)
    ('a', 0.7311)
    """
    if criterion not in CRITERIA:
        raise ValueError(f"criterion must be one of {CRITERIA}")
    subject = fits[0].subject if fits else ""
    good = [f for f in fits if f.ok and math.isfinite(getattr(f, criterion))]
    failed = {f.template: f.message for f in fits if not f.ok}
    for f in fits:
        if f.ok and not math.isfinite(getattr(f, criterion)):
            failed[f.template] = f"{criterion.upper()} is not finite (too few observations for this model)"
    aic = {f.template: f.aic for f in good}
    aicc = {f.template: f.aicc for f in good}
    bic = {f.template: f.bic for f in good}
    vals = {f.template: float(getattr(f, criterion)) for f in good}
    if not vals:
        return ModelComparison(subject, criterion, (), {}, {}, {}, {}, {}, None, None, float("nan"), failed)
    best = min(vals.values())
    delta = {k: v - best for k, v in vals.items()}
    raw = {k: math.exp(-0.5 * d) for k, d in delta.items()}
    tot = sum(raw.values())
    weights = {k: v / tot for k, v in raw.items()}
    order = sorted(vals, key=lambda k: vals[k])
    runner = order[1] if len(order) > 1 else None
    margin = delta[runner] if runner else float("nan")
    return ModelComparison(subject, criterion, tuple(vals), aic, aicc, bic, delta, weights, order[0],
                           runner, margin, failed)
