"""Exposure read off a fitted curve: AUC0–∞, Cmax, Tmax, MRT, terminal half-life, and the
fitted curve with its 95 % confidence band.

Everything here reads a :class:`~compartments.results.FitResult` (its parameters, doses
and covariance) and evaluates the model's exact solution; nothing is re-estimated.

Areas
    AUC and AUMC are integrated with Gauss–Legendre quadrature over the dosing history,
    split at every dose (after any lag) and infusion end, on sub-intervals that widen
    geometrically away from each break, out to a horizon where the curve has fallen below
    1e-6 of its peak; the remainder is added as ``C(T)/λ`` (and ``T·C(T)/λ + C(T)/λ²``
    for the first moment) with λ the curve's log-slope at the horizon. MRT = AUMC/AUC
    measured from the first dose, less half the infusion duration for an infusion (the
    same convention as :mod:`compartments.nca`).
Band
    Delta method on the log of the prediction: ``se(ln f) = sqrt(g Σ gᵀ)/f`` with ``g`` the
    sensitivity of ``f`` to the working-scale parameters (log for log-fitted ones) and Σ
    their covariance; the band ``f·exp(±z·se)`` stays positive. Where the prediction is not
    positive the band is ``f ± z·sqrt(g Σ gᵀ)``. It is the band of the mean curve (the
    uncertainty of the parameters), not a prediction interval for new observations.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import stats
from scipy.optimize import minimize_scalar

from .errors import CompartmentsError

Array = NDArray[np.float64]

__all__ = ["Curve", "Exposure", "curve_exposure", "exposure", "fitted_curve"]

#: The horizon is pushed out until the curve is below this fraction of its peak.
DECAY_FRACTION = 1e-6
#: Gauss–Legendre nodes per sub-interval and geometric sub-intervals per segment.
GL_NODES = 8
SUBINTERVALS = 24
#: The horizon grows by this factor until the curve has decayed (at most MAX_GROWTH_STEPS times).
GROWTH = 1.25
MAX_GROWTH_STEPS = 160

_GL_X, _GL_W = np.polynomial.legendre.leggauss(GL_NODES)


@dataclass(frozen=True)
class Exposure:
    """Exposure metrics of one fitted concentration–time curve.

    Attributes
    ----------
    observable : str
    unit : str
        Unit of the observable (e.g. ``mg/L``).
    time_unit : str
    auc_inf : float or None, unit·time
        AUC from the first dose to infinity over the whole dosing history (None when the
        curve does not decay, e.g. a nonlinear plateau).
    aumc_inf : float or None, unit·time²
        First-moment area from the first dose.
    cmax : float, unit
        Highest value of the fitted curve.
    tmax : float, time
        Time of ``cmax`` after the first dose.
    mrt : float or None, time
        Mean residence time AUMC/AUC (single dose only; after an oral dose it includes the
        mean absorption time).
    lambda_z : float or None, 1/time
        Terminal rate constant: minus the log-slope of the curve at the horizon.
    half_life : float or None, time
        Terminal half-life ``ln 2 / lambda_z``.
    notes : tuple of str
        Plain sentences on what could not be computed and why.
    """

    observable: str
    unit: str
    time_unit: str
    auc_inf: float | None
    aumc_inf: float | None
    cmax: float
    tmax: float
    mrt: float | None
    lambda_z: float | None
    half_life: float | None
    notes: tuple[str, ...] = ()

    def as_dict(self) -> dict[str, Any]:
        """Plain values with their units (for JSON and tables)."""
        a = f"{self.unit}·{self.time_unit}" if self.unit else self.time_unit
        return {
            "observable": self.observable,
            "auc_inf": {"value": self.auc_inf, "unit": a},
            "cmax": {"value": self.cmax, "unit": self.unit},
            "tmax": {"value": self.tmax, "unit": self.time_unit},
            "mrt": {"value": self.mrt, "unit": self.time_unit},
            "half_life": {"value": self.half_life, "unit": self.time_unit},
            "notes": list(self.notes),
        }


@dataclass(frozen=True)
class Curve:
    """A fitted curve on a grid with its pointwise confidence band."""

    times: Array
    predicted: Array
    lower: Array
    upper: Array
    observable: str
    level: float


def _geometric_nodes(a: float, b: float, n_sub: int) -> tuple[Array, Array]:
    """Gauss–Legendre nodes and weights on [a, b], sub-intervals widening away from a."""
    span = b - a
    first = span * 1e-6
    edges = a + np.concatenate([[0.0], np.geomspace(first, span, n_sub)])
    lo, hi = edges[:-1, None], edges[1:, None]
    half = 0.5 * (hi - lo)
    nodes = (lo + hi) / 2 + half * _GL_X[None, :]
    weights = half * _GL_W[None, :]
    return nodes.ravel(), weights.ravel()


def curve_exposure(
    conc: Callable[[Array], Array],
    breaks: Sequence[float],
    *,
    origin: float,
    last_time: float,
    single_dose: bool,
    infusion_duration: float = 0.0,
    observable: str = "concentration",
    unit: str = "",
    time_unit: str = "h",
) -> Exposure:
    """Exposure metrics of a curve ``conc(t)`` that starts at ``origin``.

    Parameters
    ----------
    conc : callable
        Vectorised ``times -> values`` of the curve.
    breaks : sequence of float, time
        Times where the curve may have a kink or jump (doses after lag, infusion ends).
    origin : float, time
        Time of the first dose; moments and Tmax are measured from here.
    last_time : float, time
        Last sample time (a first guess of the horizon).
    single_dose : bool
        MRT is only reported for a single dose.
    infusion_duration : float, time
        Subtracted (halved) from the MRT of a single infusion.
    observable, unit, time_unit : str
        Labels carried into the result.

    Returns
    -------
    Exposure

    Examples
    --------
    One-compartment IV bolus ``C = 10·exp(−0.2 t)``: AUC = 10/0.2 = 50, MRT = 1/0.2 = 5
    (Gibaldi & Perrier, Pharmacokinetics, 2nd ed., 1982, ch. 1 and 11).

    >>> e = curve_exposure(lambda t: 10 * np.exp(-0.2 * (t - 0)), [0.0], origin=0.0,
    ...                    last_time=24.0, single_dose=True)
    >>> round(e.auc_inf, 6), round(e.mrt, 6), round(e.half_life, 6)
    (50.0, 5.0, 3.465736)
    """
    notes: list[str] = []
    b = sorted({float(x) for x in breaks if np.isfinite(x)} | {float(origin)})
    first, last_break = b[0], b[-1]
    step = max(float(last_time) - last_break, last_break - first, 1e-6 * max(abs(last_break), 1.0))
    with np.errstate(all="ignore"):
        coarse = np.asarray(conc(np.linspace(first, last_break + step, 64)[1:]), dtype=float)
    peak = float(np.nanmax(np.abs(coarse))) if np.any(np.isfinite(coarse)) else 0.0
    decays = False
    pair = (float("nan"), float("nan"))
    for _ in range(MAX_GROWTH_STEPS):
        with np.errstate(all="ignore"):
            c = np.asarray(conc(last_break + step * np.array([0.95, 1.0])), dtype=float)
        if not np.all(np.isfinite(c)):
            break
        peak = max(peak, float(np.max(np.abs(c))))
        if c[1] <= 0.0 or (c[1] < c[0] and c[1] <= DECAY_FRACTION * peak):
            decays, pair = True, (float(c[0]), float(c[1]))
            break
        step *= GROWTH
    horizon = last_break + step
    edges = b + [horizon]
    nodes_l, weights_l = [], []
    for a, z in zip(edges[:-1], edges[1:], strict=True):
        if z > a:
            n, w = _geometric_nodes(a, z, SUBINTERVALS)
            nodes_l.append(n)
            weights_l.append(w)
    nodes = np.concatenate(nodes_l)
    weights = np.concatenate(weights_l)
    eps = 1e-9 * max(1.0, horizon - first)
    right = np.array([x + eps for x in b])
    pts = np.concatenate([nodes, right])
    with np.errstate(all="ignore"):
        vals = np.asarray(conc(pts), dtype=float)
    if not np.all(np.isfinite(vals)):
        notes.append("The fitted curve is not finite everywhere; exposure was not computed.")
        return Exposure(observable, unit, time_unit, None, None, float("nan"), float("nan"), None, None, None,
                        tuple(notes))
    cv = vals[: nodes.size]

    # Cmax / Tmax: the best grid point, refined within its neighbours.
    i = int(np.argmax(vals))
    tmax, cmax = float(pts[i]), float(vals[i])
    sp_ = np.sort(pts)
    k = int(np.searchsorted(sp_, tmax))
    seg_lo = max([x for x in b if x <= tmax] or [first])
    seg_hi = min([x for x in b if x > tmax] or [horizon])
    lo_t = max(float(sp_[max(k - 1, 0)]), seg_lo + eps)
    hi_t = min(float(sp_[min(k + 1, sp_.size - 1)]), seg_hi - eps)
    if hi_t > lo_t:
        r = minimize_scalar(lambda t: -float(np.asarray(conc(np.array([t])))[0]), bounds=(lo_t, hi_t),
                            method="bounded", options={"xatol": 1e-10 * max(1.0, hi_t)})
        if r.success and -r.fun > cmax:
            tmax, cmax = float(r.x), float(-r.fun)

    auc: float | None = float(np.sum(weights * cv))
    aumc: float | None = float(np.sum(weights * (nodes - origin) * cv))
    lam: float | None = None
    if decays:
        c1, c2 = pair
        if c1 > 0 and c2 > 0:
            lam = float(math.log(c1 / c2) / (0.05 * step))
            auc += c2 / lam  # type: ignore[operator]
            aumc += (horizon - origin) * c2 / lam + c2 / lam**2  # type: ignore[operator]
    else:
        notes.append("The fitted curve does not fall towards zero after the last dose, so AUC0–∞, MRT and "
                     "the terminal half-life are not defined.")
        auc = aumc = None
    mrt = None
    if auc is not None and aumc is not None and auc > 0:
        if single_dose:
            mrt = aumc / auc - infusion_duration / 2.0
        else:
            notes.append("MRT is given for a single dose only.")
    half = math.log(2) / lam if lam else None

    def plain(x: float | None) -> float | None:
        return None if x is None else float(x)

    return Exposure(observable, unit, time_unit, plain(auc), plain(aumc), float(cmax), float(tmax - origin),
                    plain(mrt), plain(lam), plain(half), tuple(notes))


def _subject_key(result: Any, subject: str | None) -> str | None:
    if subject is not None:
        return subject
    if result.subject in result.doses:
        return str(result.subject)
    return next(iter(result.doses), None)


def exposure(result: Any, subject: str | None = None, observable: str | None = None,
             last_time: float | None = None) -> Exposure | None:
    """Exposure metrics of a fitted PK curve (None when they do not apply).

    They apply to a successful fit of a template of kind ``"pk"`` with at least one dose.

    Parameters
    ----------
    result : FitResult
    subject : str, optional
        Whose doses to use (default: the fit's subject, or the first of a pooled fit).
    observable : str, optional
        Default: the template's first observable.
    last_time : float, optional
        Last sample time; default the last residual time of the subject.

    Returns
    -------
    Exposure or None

    Examples
    --------
    >>> from compartments import fit, Dose
    >>> from types import SimpleNamespace
    >>> t = np.array([0.5, 1, 2, 4, 8, 12, 24.])
    >>> y = 300 / 30 * 1.2 / 1.1 * (np.exp(-0.1 * t) - np.exp(-1.2 * t))
    >>> s = SimpleNamespace(id="a", times=t, values=y, observables=(None,) * 7,
    ...                     censored=np.zeros(7, bool), doses=(Dose(0, 300, "oral"),))
    >>> e = exposure(fit(s, "one-comp-oral", strategy="nls"))
    >>> round(e.auc_inf, 3)  # F·Dose/(V·ke) = 300/(30·0.1)
    100.0
    """
    t = getattr(result, "model_template", None)
    if t is None or not result.ok or t.kind != "pk":
        return None
    key = _subject_key(result, subject)
    doses = tuple(result.doses.get(key, ())) if key is not None else ()
    if not doses:
        return None
    from .model import compiled

    model = compiled(t)
    obs = observable or t.observable_names[0]
    unit = t.observable(obs).unit
    theta = model.param_vector(result.theta)
    breaks: list[float] = []
    for d in doses:
        entry = model.routes.get(d.route) or (model.routes.get("iv") if d.route == "infusion" else None)
        lag = float(theta[entry.lag_index]) if entry is not None and entry.lag_index is not None else 0.0
        breaks += [d.time, d.time + lag]
        if d.route == "infusion":
            breaks.append(d.time + lag + d.infusion_duration)
    if last_time is None:
        res = result.residuals
        mine = [float(tt) for s, tt in zip(res.subject, res.time, strict=True) if s == key] if res is not None else []
        last_time = max(mine) if mine else max(breaks) + 1.0

    def conc(times: Array) -> Array:
        return result.predict(np.maximum(times, 0.0), subject=key, observable=obs)

    single = len(doses) == 1
    dur = doses[0].infusion_duration if single and doses[0].route == "infusion" else 0.0
    try:
        return curve_exposure(conc, breaks, origin=float(doses[0].time), last_time=float(last_time),
                              single_dose=single, infusion_duration=dur, observable=obs, unit=unit,
                              time_unit=t.time_unit)
    except CompartmentsError as exc:  # e.g. the integrator fails far beyond the samples
        nan = float("nan")
        return Exposure(obs, unit, t.time_unit, None, None, nan, nan, None, None, None,
                        (f"Exposure could not be read off the fitted curve: {exc}",))


def working_scale_gradient(result: Any, times: Array, subject: str | None, observable: str | None) -> Array:
    """∂prediction/∂φ for the estimated parameters (φ = log θ for log-fitted ones)."""
    t = result.model_template
    S = result.sensitivity(times, subject=subject, observable=observable)
    scale = np.array([result.estimates[n] if t.parameter(n).log else 1.0 for n in result.parameter_names])
    return S * scale[None, :]


def fitted_curve(result: Any, times: Any, subject: str | None = None, observable: str | None = None,
                 level: float = 0.95) -> Curve:
    """The fitted curve at ``times`` with its pointwise confidence band.

    Where the covariance is not available (singular information) the band equals the
    curve (and a report says why elsewhere, in the fit's warnings).

    Parameters
    ----------
    result : FitResult
    times : array-like, template time unit
    subject : str, optional
        Whose doses to use (default: the fit's subject).
    observable : str, optional
    level : float
        Confidence level of the band.

    Returns
    -------
    Curve
    """
    tt = np.asarray(times, dtype=float)
    key = _subject_key(result, subject)
    obs = observable or result.model_template.observable_names[0]
    f = np.asarray(result.predict(tt, subject=key, observable=obs), dtype=float)
    cov = np.asarray(result.covariance, dtype=float)
    lower, upper = f.copy(), f.copy()
    k = len(result.parameter_names)
    if cov.shape == (k, k) and k and np.all(np.isfinite(cov)):
        G = working_scale_gradient(result, tt, key, obs)
        var = np.einsum("ti,ij,tj->t", G, cov, G)
        sd = np.sqrt(np.clip(var, 0.0, None))
        z = float(stats.norm.ppf(0.5 + level / 2))
        pos = f > 0
        with np.errstate(divide="ignore", invalid="ignore"):
            rel = np.where(pos, sd / np.where(pos, f, 1.0), 0.0)
        lower = np.where(pos, f * np.exp(-z * rel), f - z * sd)
        upper = np.where(pos, f * np.exp(z * rel), f + z * sd)
    return Curve(tt, f, lower, upper, obs, level)
