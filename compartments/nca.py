"""Non-compartmental analysis (NCA): a model-free cross-check of a compartmental fit.

:func:`nca` takes one concentration–time profile after a single dose and returns an
:class:`NCAResult` with Cmax, AUC, AUMC, the terminal rate constant λz and what follows
from them (t½, MRT, CL, Vz). :func:`nca_subject` does the same for a study subject and
:func:`summarize` gives descriptive statistics across subjects.

The rules are those of common practice:

* AUC and AUMC by the linear-up / log-down trapezoidal rule: a segment uses the log
  trapezoid when the concentration falls and both ends are above zero, the linear one
  otherwise.
* Values below the lower limit of quantification (``censored``) before Cmax count as 0;
  after Cmax they are left out of λz, and AUC stops at the last quantifiable sample.
* Replicate samples at one time are averaged.
* IV bolus: C0 is back-extrapolated log-linearly from the first two samples when they
  decline (else the first observed value is used) and added at time 0. Oral dose or
  infusion: a point (0, 0) is added when there is no sample at time 0.
* λz: log-linear regression over the last k ≥ ``min_points`` samples strictly after
  Cmax, choosing k with the best adjusted R² (within 1e-4 of the best, the larger k) and
  requiring a negative slope.
* Extrapolation to infinity uses the *observed* Clast: AUC0–∞ = AUC0–tlast + Clast/λz.

Nothing here raises on awkward data (zeros, all values censored, one sample, NaN): the
result carries plain-sentence ``notes`` instead, and no number in it is NaN.
Only invalid arguments (an unknown route, arrays of unequal length) raise
:class:`~compartments.errors.UsageError`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from numbers import Real
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .errors import UsageError

__all__ = ["NCAResult", "nca", "nca_subject", "summarize", "SUMMARY_QUANTITIES"]

ROUTES = ("iv", "oral", "infusion")

#: AUC0–∞ with more than this percentage extrapolated gets a note (common practice).
EXTRAPOLATION_LIMIT_PCT = 20.0

#: Adjusted R² values closer than this to the best count as ties; the larger k wins.
R2_TIE_TOLERANCE = 1e-4

#: Quantities that :func:`summarize` describes across subjects.
SUMMARY_QUANTITIES = (
    "cmax",
    "tmax",
    "clast",
    "tlast",
    "auc_last",
    "auc_inf",
    "auc_extrap_pct",
    "aumc_last",
    "aumc_inf",
    "mrt",
    "lambda_z",
    "half_life",
    "cl",
    "vz",
)

_FloatArray = NDArray[np.float64]
_BoolArray = NDArray[np.bool_]


@dataclass(frozen=True)
class NCAResult:
    """Non-compartmental summary of one concentration–time profile.

    Attributes
    ----------
    cmax : float, concentration unit
        Highest quantifiable observed concentration (0 when there is none).
    tmax : float, h
        First time at which ``cmax`` was observed (0 when there is no quantifiable value).
    clast : float, concentration unit
        Last quantifiable concentration above zero (0 when there is none).
    tlast : float, h
        Time of ``clast`` (0 when there is none).
    auc_last : float, concentration unit · h
        AUC from 0 to ``tlast``, linear-up / log-down trapezoidal rule.
    auc_inf : float or None, concentration unit · h
        AUC from 0 to infinity, ``auc_last + clast / lambda_z`` with the observed Clast.
    auc_extrap_pct : float or None, %
        Share of ``auc_inf`` that is extrapolated beyond ``tlast``.
    aumc_last : float, concentration unit · h²
        Area under the first-moment curve t·C(t) from 0 to ``tlast``.
    aumc_inf : float or None, concentration unit · h²
        ``aumc_last + tlast·clast/λz + clast/λz²``.
    mrt : float or None, h
        Mean residence time ``aumc_inf / auc_inf``, less half the infusion duration for an
        infusion. After an oral dose it includes the mean absorption time.
    lambda_z : float or None, 1/h
        Terminal rate constant (minus the slope of ln C against t).
    half_life : float or None, h
        Terminal half-life ``ln 2 / lambda_z``.
    lambda_z_points : int or None
        Number of samples in the terminal regression.
    lambda_z_r2_adj : float or None
        Adjusted R² of the terminal regression.
    lambda_z_start : float or None, h
        Time of the first sample in the terminal regression (the last is ``tlast``).
    cl : float or None, volume unit/h
        ``dose / auc_inf``; clearance over bioavailability (CL/F) after an oral dose.
    vz : float or None, volume unit
        ``dose / (lambda_z · auc_inf)``; Vz/F after an oral dose.
    dose : float or None, dose unit
    route : str or None
        ``"iv"`` (bolus), ``"oral"`` or ``"infusion"``.
    notes : tuple of str
        Plain sentences on what was done to the data and why a quantity is missing.
    c0 : float or None, concentration unit
        Concentration at time 0 used for an IV bolus (back-extrapolated or observed).
    """

    cmax: float
    tmax: float
    clast: float
    tlast: float
    auc_last: float
    auc_inf: float | None
    auc_extrap_pct: float | None
    aumc_last: float
    aumc_inf: float | None
    mrt: float | None
    lambda_z: float | None
    half_life: float | None
    lambda_z_points: int | None
    lambda_z_r2_adj: float | None
    lambda_z_start: float | None
    cl: float | None
    vz: float | None
    dose: float | None
    route: str | None
    notes: tuple[str, ...]
    c0: float | None = None


@dataclass(frozen=True)
class _TerminalFit:
    lambda_z: float
    points: int
    r2_adj: float
    start: float


# --------------------------------------------------------------------------- checks


def _as_arrays(
    times: ArrayLike, conc: ArrayLike, censored: ArrayLike | None
) -> tuple[_FloatArray, _FloatArray, _BoolArray]:
    try:
        t = np.asarray(times, dtype=float)
        c = np.asarray(conc, dtype=float)
    except (TypeError, ValueError) as exc:
        raise UsageError(
            f"nca: times and concentrations must be numbers ({exc}); pass numeric arrays"
        ) from None
    if t.ndim != 1 or c.ndim != 1:
        raise UsageError(
            f"nca: times and concentrations must be one-dimensional, got shapes "
            f"{t.shape} and {c.shape}; pass one profile at a time"
        )
    if t.shape != c.shape:
        raise UsageError(
            f"nca: {t.size} times but {c.size} concentrations; pass one concentration per time"
        )
    if censored is None:
        cens = np.zeros(t.shape, dtype=bool)
    else:
        cens = np.asarray(censored)
        if cens.shape != t.shape:
            raise UsageError(
                f"nca: censored has shape {cens.shape} but there are {t.size} times; "
                f"pass one True/False flag per sample"
            )
        if cens.dtype != bool:
            try:
                cens = cens.astype(float)
            except (TypeError, ValueError):
                raise UsageError(
                    "nca: censored must hold True/False flags, one per sample"
                ) from None
            cens = np.nan_to_num(cens, nan=0.0) != 0
    return t, c, cens


def _check_options(
    dose: float | None, route: str, infusion_duration: float | None, min_points: int
) -> None:
    if route not in ROUTES:
        raise UsageError(f"nca: unknown route {route!r}; use one of {', '.join(ROUTES)}")
    if dose is not None and not (isinstance(dose, Real) and math.isfinite(dose)):
        raise UsageError(f"nca: dose must be a finite number or None, got {dose!r}")
    if dose is not None and dose < 0:
        raise UsageError(f"nca: dose {dose} is negative; pass the amount given")
    if route == "infusion":
        if infusion_duration is None:
            raise UsageError("nca: route='infusion' needs infusion_duration (h); pass the duration")
        if not (math.isfinite(infusion_duration) and infusion_duration > 0):
            raise UsageError(
                f"nca: infusion_duration {infusion_duration} must be a positive number"
            )
    elif infusion_duration not in (None, 0, 0.0):
        raise UsageError(
            f"nca: infusion_duration={infusion_duration} given with route={route!r}; "
            f"use route='infusion' or leave infusion_duration out"
        )
    if isinstance(min_points, bool) or not isinstance(min_points, int | np.integer):
        raise UsageError(f"nca: min_points must be an integer, got {min_points!r}")
    if min_points < 3:
        raise UsageError(
            f"nca: min_points={min_points} is too small; the adjusted R² of the terminal "
            f"regression needs at least 3 points"
        )


def _plural(n: int, one: str, many: str) -> str:
    return f"{n} {one if n == 1 else many}"


# --------------------------------------------------------------------------- data


def _clean(
    t: _FloatArray, c: _FloatArray, cens: _BoolArray, notes: list[str]
) -> tuple[_FloatArray, _FloatArray, _BoolArray]:
    """Drop unusable samples, sort by time and average replicates."""
    bad_time = ~np.isfinite(t)
    if bad_time.any():
        notes.append(
            f"{_plural(int(bad_time.sum()), 'sample', 'samples')} with a missing or "
            f"non-finite time were left out."
        )
    before = np.isfinite(t) & (t < 0)
    if before.any():
        notes.append(
            f"{_plural(int(before.sum()), 'sample', 'samples')} taken before the dose "
            f"(negative time) were left out."
        )
    bad_conc = ~cens & ~np.isfinite(c)
    if bad_conc.any():
        notes.append(
            f"{_plural(int(bad_conc.sum()), 'concentration', 'concentrations')} "
            f"missing or non-finite were left out."
        )
    negative = ~cens & np.isfinite(c) & (c < 0)
    if negative.any():
        notes.append(
            f"{_plural(int(negative.sum()), 'negative concentration', 'negative concentrations')} "
            f"were left out."
        )
    keep = ~(bad_time | before | bad_conc | negative)
    t, c, cens = t[keep], c[keep], cens[keep]
    order = np.argsort(t, kind="stable")
    t, c, cens = t[order], c[order], cens[order]

    ut, first, counts = np.unique(t, return_index=True, return_counts=True)
    if ut.size == t.size:
        return t, c, cens
    uc = np.empty(ut.size)
    ucens = np.zeros(ut.size, dtype=bool)
    mixed = 0
    for i, (start, n) in enumerate(zip(first, counts, strict=True)):
        q = ~cens[start : start + n]
        if q.any():
            uc[i] = float(np.mean(c[start : start + n][q]))
            mixed += int(not q.all())
        else:
            uc[i] = math.nan
            ucens[i] = True
    sentence = (
        f"{_plural(int((counts > 1).sum()), 'time has', 'times have')} replicate samples; "
        f"their quantifiable concentrations were averaged"
    )
    if mixed:
        sentence += " (values below the LLOQ among replicates were left out of the mean)"
    notes.append(sentence + ".")
    return ut, uc, ucens


# --------------------------------------------------------------------------- areas


def _first_moment_factor(x: float) -> float:
    """g(x) = (1 − e^(−x)·(1 + x)) / x², accurate also for small x.

    ∫ s·e^(−x·s/Δt) ds over [0, Δt] equals Δt²·g(x); the series below is its Taylor
    expansion, used where the closed form would lose digits to cancellation.
    """
    if x < 1e-2:
        return 0.5 - x / 3 + x**2 / 8 - x**3 / 30 + x**4 / 144 - x**5 / 840
    return (-math.expm1(-x) - x * math.exp(-x)) / x**2


def _segment_areas(t: _FloatArray, c: _FloatArray) -> tuple[float, float]:
    """AUC and AUMC over the whole of ``t`` by the linear-up / log-down rule."""
    scale = float(c.max()) if c.size and c.max() > 0 else 1.0
    c = c / scale  # keeps the intermediate products in range for extreme magnitudes
    auc = 0.0
    aumc = 0.0
    for i in range(t.size - 1):
        t1, t2, c1, c2 = float(t[i]), float(t[i + 1]), float(c[i]), float(c[i + 1])
        dt = t2 - t1
        if 0 < c2 < c1:
            # Exact integrals of C and t·C for C falling exponentially from c1 to c2:
            # AUC = (c1 − c2)·Δt / ln(c1/c2), AUMC = t1·AUC + c1·Δt²·g(ln(c1/c2)), the
            # same as (t1·c1 − t2·c2)·Δt/L + (c1 − c2)·Δt²/L² but free of cancellation.
            x = math.log1p((c1 - c2) / c2)  # ln(c1/c2), accurate when c1 ≈ c2
            seg = (c1 - c2) * dt / x
            auc += seg
            aumc += t1 * seg + c1 * dt**2 * _first_moment_factor(x)
        else:
            auc += 0.5 * (c1 + c2) * dt
            aumc += 0.5 * (t1 * c1 + t2 * c2) * dt
    return auc * scale, aumc * scale


# --------------------------------------------------------------------------- λz


def _terminal_fit(
    t: _FloatArray, c: _FloatArray, tmax: float, min_points: int, notes: list[str]
) -> _TerminalFit | None:
    """Best log-linear terminal regression over the last k samples after Cmax."""
    use = (t > tmax) & (c > 0)
    x, y = t[use], np.log(c[use])
    if x.size < min_points:
        notes.append(
            f"λz could not be estimated: {_plural(x.size, 'quantifiable concentration', 'quantifiable concentrations')} "
            f"above zero after Cmax, at least {min_points} are needed."
        )
        return None
    best: list[tuple[int, float, float]] = []  # (k, adjusted R², slope)
    for k in range(min_points, x.size + 1):
        xs, ys = x[-k:], y[-k:]
        xc, yc = xs - xs.mean(), ys - ys.mean()
        sxx, syy = float(xc @ xc), float(yc @ yc)
        if sxx <= 0 or syy <= 0:
            continue
        slope = float(xc @ yc) / sxx
        if not slope < 0:
            continue
        resid = yc - slope * xc
        r2 = 1.0 - float(resid @ resid) / syy
        r2_adj = 1.0 - (1.0 - r2) * (k - 1) / (k - 2)
        best.append((k, r2_adj, slope))
    if not best:
        notes.append(
            "λz could not be estimated: no terminal log-linear regression after Cmax "
            "has a negative slope."
        )
        return None
    top = max(r for _, r, _ in best)
    k, r2_adj, slope = max((b for b in best if b[1] >= top - R2_TIE_TOLERANCE), key=lambda b: b[0])
    return _TerminalFit(lambda_z=-slope, points=k, r2_adj=r2_adj, start=float(x[-k]))


# --------------------------------------------------------------------------- core


def _empty_result(
    dose: float | None, route: str, notes: list[str], cmax: float = 0.0, tmax: float = 0.0
) -> NCAResult:
    return NCAResult(
        cmax=cmax, tmax=tmax, clast=0.0, tlast=0.0, auc_last=0.0, auc_inf=None,
        auc_extrap_pct=None, aumc_last=0.0, aumc_inf=None, mrt=None, lambda_z=None,
        half_life=None, lambda_z_points=None, lambda_z_r2_adj=None, lambda_z_start=None,
        cl=None, vz=None, dose=dose, route=route, notes=tuple(notes),
    )  # fmt: skip


def _analyse(
    times: ArrayLike,
    conc: ArrayLike,
    *,
    dose: float | None,
    route: str,
    infusion_duration: float | None,
    censored: ArrayLike | None,
    min_points: int,
    extrapolate: bool,
    notes: list[str],
) -> NCAResult:
    t, c, cens = _as_arrays(times, conc, censored)
    _check_options(dose, route, infusion_duration, min_points)
    dose = None if dose is None else float(dose)
    t, c, cens = _clean(t, c, cens, notes)

    quant = ~cens
    if not quant.any():
        notes.append(
            "No quantifiable concentration: Cmax, Clast and AUC are reported as 0 and "
            "nothing else can be estimated."
            if t.size
            else "No usable samples: Cmax, Clast and AUC are reported as 0 and nothing "
            "else can be estimated."
        )
        return _empty_result(dose, route, notes)

    iq = np.flatnonzero(quant)
    imax = int(iq[np.argmax(c[iq])])  # argmax returns the first occurrence
    cmax, tmax = float(c[imax]), float(t[imax])

    # Censored values: 0 before Cmax, left out after it.
    early = cens & (t < tmax)
    if early.any():
        notes.append(
            f"{_plural(int(early.sum()), 'concentration', 'concentrations')} below the "
            f"LLOQ before Cmax were set to 0."
        )
    late = cens & (t > tmax)
    c = np.where(early, 0.0, c)
    t_late = t[late]
    t, c = t[~late], c[~late]

    positive = np.flatnonzero(c > 0)
    if positive.size == 0:
        notes.append("No concentration above zero: AUC is 0 and λz cannot be estimated.")
        return _empty_result(dose, route, notes, cmax=cmax, tmax=tmax)
    ilast = int(positive[-1])
    tlast, clast = float(t[ilast]), float(c[ilast])
    if t_late.size:
        inner = int((t_late < tlast).sum())
        sentence = (
            f"{_plural(int(t_late.size), 'concentration', 'concentrations')} below the "
            f"LLOQ after Cmax {'was' if t_late.size == 1 else 'were'} left out of λz and AUC"
        )
        if inner:
            sentence += f" ({inner} before the last quantifiable sample, bridged by AUC)"
        notes.append(sentence + "; AUC stops at the last quantifiable sample.")
    t, c = t[: ilast + 1], c[: ilast + 1]
    if t.size == 1:
        notes.append("Only one usable concentration–time point.")

    c0: float | None = None
    if route == "iv":
        if t[0] == 0 and c[0] > 0:
            c0 = float(c[0])
            notes.append("The concentration observed at time 0 was used as C0.")
        else:
            if t[0] == 0:
                t, c = t[1:], c[1:]
                notes.append(
                    "The zero concentration at time 0 was replaced by C0 for the IV bolus."
                )
            log_c0 = math.inf
            if t.size >= 2 and c[0] > c[1] > 0:
                # log-linear back-extrapolation through the first two samples
                slope = (math.log(c[1]) - math.log(c[0])) / (t[1] - t[0])
                log_c0 = math.log(c[0]) - slope * t[0]
            if log_c0 < math.log(np.finfo(float).max):
                c0 = math.exp(log_c0)
            else:
                c0 = float(c[0])
                why = "do not decline" if math.isinf(log_c0) else "extrapolate beyond range"
                notes.append(
                    f"The first two concentrations {why}; C0 was set to the first observed "
                    f"concentration."
                )
            t, c = np.concatenate([[0.0], t]), np.concatenate([[c0], c])
    elif t[0] > 0:
        t, c = np.concatenate([[0.0], t]), np.concatenate([[0.0], c])
    elif c[0] > 0:
        notes.append(
            f"The concentration at time 0 is {c[0]:g}, not 0 (pre-dose level); it was "
            f"used as it is."
        )

    auc_last, aumc_last = _segment_areas(t, c)
    fit = _terminal_fit(t, c, tmax, min_points, notes)

    result = NCAResult(
        cmax=cmax, tmax=tmax, clast=clast, tlast=tlast, auc_last=auc_last, auc_inf=None,
        auc_extrap_pct=None, aumc_last=aumc_last, aumc_inf=None, mrt=None, lambda_z=None,
        half_life=None, lambda_z_points=None, lambda_z_r2_adj=None, lambda_z_start=None,
        cl=None, vz=None, dose=dose, route=route, notes=(), c0=c0,
    )  # fmt: skip
    if fit is None:
        return replace(result, notes=tuple(notes))
    lz = fit.lambda_z
    result = replace(
        result,
        lambda_z=lz,
        half_life=math.log(2.0) / lz,
        lambda_z_points=fit.points,
        lambda_z_r2_adj=fit.r2_adj,
        lambda_z_start=fit.start,
    )
    if not extrapolate:
        return replace(result, notes=tuple(notes))

    auc_inf = auc_last + clast / lz
    aumc_inf = aumc_last + tlast * clast / lz + clast / lz**2
    extrap = 100.0 * (auc_inf - auc_last) / auc_inf
    mrt = aumc_inf / auc_inf - (0.5 * float(infusion_duration) if route == "infusion" else 0.0)
    if not all(map(math.isfinite, (auc_inf, aumc_inf, extrap, mrt))):
        notes.append(
            f"λz = {lz:.3g} is too small to extrapolate to infinity; AUC0–∞, MRT, CL and "
            f"Vz are not reported."
        )
        return replace(result, notes=tuple(notes))
    if extrap > EXTRAPOLATION_LIMIT_PCT:
        notes.append(
            f"AUC0–∞ is {extrap:.1f}% extrapolated (more than "
            f"{EXTRAPOLATION_LIMIT_PCT:g}%); AUC0–∞, MRT, CL and Vz are uncertain."
        )
    cl = vz = None
    if dose is not None and dose > 0:
        cl = dose / auc_inf
        vz = dose / (lz * auc_inf)
    elif dose is not None:
        notes.append("The dose is 0; CL and Vz are not computed.")
    return replace(
        result,
        auc_inf=auc_inf,
        auc_extrap_pct=extrap,
        aumc_inf=aumc_inf,
        mrt=mrt,
        cl=cl,
        vz=vz,
        notes=tuple(notes),
    )


def nca(
    times: ArrayLike,
    conc: ArrayLike,
    *,
    dose: float | None = None,
    route: str = "oral",
    infusion_duration: float | None = None,
    censored: ArrayLike | None = None,
    min_points: int = 3,
) -> NCAResult:
    """Non-compartmental analysis of one profile after a single dose.

    Parameters
    ----------
    times : array_like, h
        Sampling times after the dose. Samples at negative or non-finite times are left
        out with a note; replicate times are averaged.
    conc : array_like, concentration unit
        Concentrations. Non-finite or negative values (not censored) are left out with a
        note.
    dose : float, dose unit, optional
        Amount given; needed for CL and Vz.
    route : {"oral", "iv", "infusion"}
        ``"iv"`` is a bolus (C0 is back-extrapolated); ``"oral"`` gives CL/F and Vz/F.
    infusion_duration : float, h, optional
        Required for ``route="infusion"``; MRT is reduced by half of it.
    censored : array_like of bool, optional
        True where the value is below the lower limit of quantification (its number is
        ignored).
    min_points : int
        Fewest samples in the terminal regression (at least 3).

    Returns
    -------
    NCAResult

    Raises
    ------
    UsageError
        Invalid arguments (unknown route, arrays of unequal length, negative dose, ...).
        Awkward data never raise: they give notes.

    Examples
    --------
    >>> r = nca([0, 1, 2, 4, 8, 12], [0, 4, 6, 3, 1.5, 0.75], dose=100)
    >>> r.cmax, r.tmax, r.lambda_z_points, round(r.half_life, 6)
    (6.0, 2.0, 3, 4.0)
    >>> round(r.auc_last, 4), round(r.auc_inf, 4)
    (28.6404, 32.9685)
    """
    notes: list[str] = []
    return _analyse(
        times,
        conc,
        dose=dose,
        route=route,
        infusion_duration=infusion_duration,
        censored=censored,
        min_points=min_points,
        extrapolate=True,
        notes=notes,
    )


# --------------------------------------------------------------------------- subjects


def _subject_label(subject: Any) -> str:
    for attr in ("id", "name", "subject"):
        value = getattr(subject, attr, None)
        if isinstance(value, str | int | np.integer):
            return f"subject {value}"
    return "subject"


def _observable_mask(subject: Any, n: int, observable: str | None, label: str) -> NDArray[np.bool_]:
    raw = getattr(subject, "observables", None)
    if raw is None or isinstance(raw, str):
        labels: list[Any] = [] if raw is None else [raw]
    else:
        labels = list(raw)
    names = list(dict.fromkeys(str(x) for x in labels))
    if len(labels) == n and n > 0:
        row_names = np.array([str(x) for x in labels], dtype=object)
        if observable is None:
            if len(names) > 1:
                raise UsageError(
                    f"nca_subject: {label} has several observables ({', '.join(names)}); "
                    f"pass observable= to choose one"
                )
            return np.ones(n, dtype=bool)
        mask = row_names == observable
        if not mask.any():
            raise UsageError(
                f"nca_subject: {label} has no observations of {observable!r}; it has "
                f"{', '.join(names) or 'none'}"
            )
        return np.asarray(mask, dtype=bool)
    # Not one label per observation: a list of names.
    if len(names) > 1:
        raise UsageError(
            f"nca_subject: {label} lists observables {', '.join(names)} but not which "
            f"observation belongs to which; give one label per observation"
        )
    if observable is not None and names and observable not in names:
        raise UsageError(
            f"nca_subject: {label} has no observable {observable!r}; it has {', '.join(names)}"
        )
    return np.ones(n, dtype=bool)


def nca_subject(subject: Any, observable: str | None = None, route: str | None = None) -> NCAResult:
    """Non-compartmental analysis of one study subject.

    The subject is duck-typed: it needs ``times``, ``values``, ``censored`` (flags or
    None), ``observables`` (one name per observation, or None) and ``doses`` (objects
    with ``time``, ``amount``, ``route`` and ``infusion_duration``, like
    :class:`~compartments.dosing.Dose`). Times are taken relative to the first dose,
    whose amount and route are used.

    With more than one dose only the first dosing interval is analysed (samples up to
    and including the time of the second dose); Cmax, AUC0–tlast and λz are reported,
    the quantities extrapolated to infinity (AUC0–∞, AUMC0–∞, % extrapolated, MRT, CL,
    Vz) are None, and a note says so.

    ``route`` is used when the dose's own route is ``"auto"`` (the file did not state it;
    a caller that fits a model passes the route the model gives it); without it such a
    dose is analysed as extravascular, with a note.

    Parameters
    ----------
    subject : object
        A study subject (see above).
    observable : str, optional
        Which observable to analyse; needed when the subject has several.

    Returns
    -------
    NCAResult

    Raises
    ------
    UsageError
        The observable is unknown or ambiguous, or the subject's arrays do not match.

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> from compartments.dosing import Dose
    >>> s = SimpleNamespace(times=[1, 2, 4, 8, 12], values=[4, 6, 3, 1.5, 0.75],
    ...                     censored=None, observables=None, doses=[Dose(0, 100, "oral")])
    >>> round(nca_subject(s).half_life, 6)
    4.0
    """
    label = _subject_label(subject)
    try:
        times = np.asarray(subject.times, dtype=float)
        values = np.asarray(subject.values, dtype=float)
    except (TypeError, ValueError) as exc:
        raise UsageError(f"nca_subject: {label} times and values must be numbers ({exc})") from None
    if times.ndim != 1 or times.shape != values.shape:
        raise UsageError(
            f"nca_subject: {label} has {times.size} times but {values.size} values; "
            f"they must match one to one"
        )
    censored = getattr(subject, "censored", None)
    cens = None
    if censored is not None:
        cens = np.asarray(censored)
        if cens.shape != times.shape:
            raise UsageError(
                f"nca_subject: {label} has {cens.size} censoring flags for {times.size} "
                f"observations; they must match one to one"
            )
    mask = _observable_mask(subject, times.size, observable, label)
    times, values = times[mask], values[mask]
    cens = None if cens is None else cens[mask]

    notes: list[str] = []
    doses: Sequence[Any] = sorted(getattr(subject, "doses", None) or [], key=lambda d: d.time)
    if not doses:
        notes.append(
            f"{label.capitalize()} has no dose record: times are taken as time after the "
            f"dose, the route as oral, and CL and Vz are not computed."
        )
        result = _analyse(
            times, values, dose=None, route="oral", infusion_duration=None, censored=cens,
            min_points=3, extrapolate=True, notes=notes,
        )  # fmt: skip
        return replace(result, route=None)

    first = doses[0]
    given = str(first.route)
    if given == "auto":
        # the file did not say; the caller may know it from the model (fit) or the user
        if route is None:
            route = "oral"
            notes.append(
                f"The route of {label}'s dose is not stated; it was analysed as extravascular "
                "(no back-extrapolation to C0). Give the route (--route) if it was an IV bolus."
            )
    else:
        route = given
    duration = float(first.infusion_duration) if route == "infusion" else None
    rel = times - float(first.time)
    extrapolate = len(doses) == 1
    if not extrapolate:
        later = [float(d.time) for d in doses[1:] if float(d.time) > float(first.time)]
        if later:
            end = min(later) - float(first.time)
            inside = ~(rel > end)  # keeps NaN times so that they get their own note
            rel, values = rel[inside], values[inside]
            cens = None if cens is None else cens[inside]
            window = f"the first dosing interval (0 to {end:g} h after the first dose)"
        else:
            window = "all samples (every dose was given at the same time)"
        notes.append(
            f"{label.capitalize()} received {len(doses)} doses; only {window} was "
            f"analysed, with the first dose's amount, and quantities extrapolated to "
            f"infinity (AUC0–∞, AUMC0–∞, MRT, CL, Vz) are not reported."
        )
    return _analyse(
        rel, values, dose=float(first.amount), route=route, infusion_duration=duration,
        censored=cens, min_points=3, extrapolate=extrapolate, notes=notes,
    )  # fmt: skip


# --------------------------------------------------------------------------- summary


def _describe(values: _FloatArray) -> dict[str, float | int | None]:
    n = int(values.size)
    out: dict[str, float | int | None] = {
        "n": n,
        "geometric_mean": None,
        "geometric_cv_pct": None,
        "median": None,
        "min": None,
        "max": None,
        "mean": None,
        "sd": None,
    }
    if n == 0:
        return out
    out["median"] = float(np.median(values))
    out["min"] = float(values.min())
    out["max"] = float(values.max())
    out["mean"] = float(values.mean())
    if n >= 2:
        out["sd"] = float(values.std(ddof=1))
    if (values > 0).all():
        logs = np.log(values)
        out["geometric_mean"] = float(np.exp(logs.mean()))
        if n >= 2:
            # CV of a log-normal variable: sqrt(exp(s²) − 1), s the SD of ln x
            out["geometric_cv_pct"] = float(100.0 * math.sqrt(math.expm1(logs.var(ddof=1))))
    return out


def summarize(results: Mapping[str, NCAResult]) -> dict[str, dict[str, float | int | None]]:
    """Descriptive statistics of NCA quantities across subjects.

    Parameters
    ----------
    results : mapping of str to NCAResult
        One result per subject.

    Returns
    -------
    dict
        For each quantity in :data:`SUMMARY_QUANTITIES`, a dict with ``n`` (subjects with
        a value), ``geometric_mean``, ``geometric_cv_pct`` (100·sqrt(exp(s²) − 1), s the
        SD of the logs), ``median``, ``min``, ``max``, ``mean`` and ``sd`` (n − 1
        denominator). Statistics that cannot be formed are None: geometric ones when a
        value is ≤ 0, spreads when n < 2.

    Examples
    --------
    >>> a = nca([0, 1, 2, 4, 8, 12], [0, 4, 6, 3, 1.5, 0.75])
    >>> b = nca([0, 1, 2, 4, 8, 12], [0, 2, 3, 1.5, 0.75, 0.375])
    >>> summarize({"a": a, "b": b})["cmax"]["geometric_mean"]
    4.242640687119285
    """
    for key, r in results.items():
        if not isinstance(r, NCAResult):
            raise UsageError(
                f"summarize: the entry for {key!r} is a {type(r).__name__}, not an "
                f"NCAResult; pass results of nca() or nca_subject()"
            )
    summary: dict[str, dict[str, float | int | None]] = {}
    for name in SUMMARY_QUANTITIES:
        vals = [getattr(r, name) for r in results.values()]
        arr = np.array([v for v in vals if v is not None and math.isfinite(v)], dtype=float)
        summary[name] = _describe(arr)
    return summary
