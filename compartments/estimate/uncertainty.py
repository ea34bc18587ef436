"""Uncertainty of the estimates: covariance, SE, %RSE, CI, correlation; profiles; bootstrap.

Covariance
    For additive error on one observable without censoring, as in standard nonlinear
    regression: ``s² (JᵀJ)⁻¹`` with ``s² = SSR/(n − p)`` (e.g. Bates & Watts, Nonlinear
    Regression Analysis and Its Applications, 1988, §2.3). Otherwise the inverse of the
    observed Fisher information: the Hessian of −log L over structural and error
    parameters, by central differences of the analytic gradient, with the structural block
    scaled by ``n/(n − p)``. The maximum-likelihood error scale divides the weighted residual
    sum of squares by n instead of n − p and so understates the spread on small samples; the
    factor turns it into the weighted-regression estimate ``s² = SSR_w/(n − p)`` (the same
    correction as the additive case above; Seber & Wild, Nonlinear Regression, 1989, §2.2.1).
    Measured on a 10-sample one-compartment oral design, it lifts 95 % coverage of ka from
    about 89 % to the nominal range (benchmarks/estimator.py).
Intervals
    95 % Wald intervals on the working scale (log scale for log-fitted parameters, then
    back-transformed) with Student-t quantiles on ``n − p`` degrees of freedom (p structural
    parameters; the combined error model also spends one per observable on its second error
    parameter), which reduces to the normal quantile for large n.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray
from scipy import stats
from scipy.optimize import brentq

from ..errors import CompartmentsError
from .derivatives import hessian
from .likelihood import neg2ll
from .nls import is_plain_least_squares
from .problem import Problem

Array = NDArray[np.float64]

SINGULAR_RCOND = 1e-10


@dataclass(frozen=True)
class Uncertainty:
    """Covariance on the working scale and summaries on the natural scale."""

    cov_phi: Array  # (k, k) structural parameters, working scale
    se: Array  # (k,) natural scale (delta method)
    se_phi: Array
    ci: Array  # (k, 2) natural scale
    correlation: Array
    df: int
    quantile: float
    method: str
    singular: tuple[int, ...] = ()  # indices of parameters the information cannot fix
    cov_error: Array = field(default_factory=lambda: np.zeros((0, 0)))


def _information_singular(info: Array) -> tuple[bool, tuple[int, ...]]:
    d = np.sqrt(np.abs(np.diag(info)))
    if np.any(~np.isfinite(info)):
        return True, tuple(range(info.shape[0]))
    if np.any(d == 0):
        return True, tuple(int(i) for i in np.flatnonzero(d == 0))
    scaled = info / np.outer(d, d)
    w, v = np.linalg.eigh(scaled)
    if w[0] > SINGULAR_RCOND * max(w[-1], 1e-300):
        return False, ()
    bad = set()
    for j in np.flatnonzero(w <= SINGULAR_RCOND * max(w[-1], 1e-300)):
        vec = np.abs(v[:, j])
        bad.update(int(i) for i in np.flatnonzero(vec > 0.3 * vec.max()))
    return True, tuple(sorted(bad))


def estimate_uncertainty(problem: Problem, phi: Array, eta: Array, level: float = 0.95) -> Uncertainty:
    """Covariance and intervals at the estimate ``phi`` (working scale)."""
    k = phi.size
    n = problem.n_obs
    y, cens, idx, err = problem.values, problem.censored, problem.obs_index, problem.error
    floor = problem.floor
    f, J = problem.predict(phi, jacobian=True)
    assert J is not None
    n_err = eta.size
    # error parameters beyond one scale per observable (the combined model's second one)
    extra = n_err // 2 if err == "combined" else 0
    df = max(n - k - extra, 0)
    cov_err = np.zeros((0, 0))
    if is_plain_least_squares(problem):
        method = "s²(JᵀJ)⁻¹, s² = SSR/(n − p)"
        info = J.T @ J
        singular, bad = _information_singular(info)
        ssr = float(np.sum((y - f) ** 2))
        s2 = ssr / (n - k) if n > k else np.nan
        cov = s2 * np.linalg.pinv(info) if not singular else np.full((k, k), np.nan)
        df = max(n - k, 0)
    else:
        method = "inverse observed Fisher information × n/(n − p)"

        def grad(x: Array) -> Array:
            p, e = x[:k], x[k:]
            ff, JJ = problem.predict(p, jacobian=True)
            t = neg2ll(err, y, ff, e, idx, cens, floor)
            return 0.5 * np.concatenate([JJ.T @ t.d_f, t.d_eta])

        x = np.concatenate([phi, eta])
        H = hessian(grad, x)
        # error parameters of observables without data carry no information: leave them out
        keep = list(range(k)) + [k + j for j in range(n_err) if np.any(H[k + j] != 0)]
        Hk = H[np.ix_(keep, keep)]
        singular, bad = _information_singular(Hk)
        bad = tuple(keep[i] for i in bad if keep[i] < k)
        if singular and not bad:
            singular = False  # only error parameters are poorly determined
        cov = np.full((k, k), np.nan)
        if not singular:
            try:
                full = np.linalg.inv(Hk)
            except np.linalg.LinAlgError:
                singular, bad = True, tuple(range(k))
            else:
                cov = full[:k, :k] * (n / df if df >= 1 else 1.0)
                cov_err = full[k:, k:]
                if np.any(np.diag(cov) < 0) or not np.all(np.isfinite(cov)):
                    singular = True
                    bad = tuple(int(i) for i in np.flatnonzero(~(np.diag(cov) >= 0))) or tuple(range(k))
                    cov = np.full((k, k), np.nan)
    se_phi = np.sqrt(np.clip(np.diag(cov), 0, None)) if not singular else np.full(k, np.nan)
    q = float(stats.t.ppf(0.5 + level / 2, df)) if df >= 1 else float("nan")
    theta = problem.to_theta_free(phi)
    logm = problem.log_mask
    se = np.where(logm, theta * se_phi, se_phi)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        lo = np.where(logm, np.exp(phi - q * se_phi), phi - q * se_phi)
        hi = np.where(logm, np.exp(phi + q * se_phi), phi + q * se_phi)
        corr = cov / np.outer(se_phi, se_phi)
    return Uncertainty(cov_phi=cov, se=se, se_phi=se_phi, ci=np.column_stack([lo, hi]),
                       correlation=corr, df=df, quantile=q, method=method,
                       singular=tuple(bad) if singular else (), cov_error=cov_err)


# -- profile likelihood -------------------------------------------------------------------
@dataclass(frozen=True)
class Profile:
    """Profile of −2LL over one parameter (natural scale)."""

    name: str
    values: Array
    objective: Array  # −2LL minimised over the other parameters
    ci: tuple[float, float]  # where −2LL rises by ``threshold`` (nan when not reached)
    threshold: float


def profile_parameter(problem: Problem, phi: Array, best: float, j: int, se_phi: float,
                      refit: Callable[[Problem, Array], tuple[Array, float]], level: float = 0.95,
                      max_steps: int = 10, df: int | None = None) -> Profile:
    """Profile parameter ``j`` of ``problem`` around the estimate ``phi``.

    ``refit(sub_problem, start) -> (phi_sub, objective)`` re-optimises the others. The
    interval ends where −2LL has risen by ``n·log(1 + t²/df)`` (t the Student quantile on
    ``df`` degrees of freedom): the profile-t interval of nonlinear regression (Bates &
    Watts 1988, §6.1) written for a profiled error scale, so that it matches the Wald
    interval's n − p correction; it tends to the χ²₁ quantile as n grows. Without ``df``
    the χ²₁ quantile is used.
    """
    from dataclasses import replace

    n = problem.n_obs
    if df is not None and df >= 1:
        t = float(stats.t.ppf(0.5 + level / 2, df))
        thr = float(n * np.log1p(t * t / df))
    else:
        thr = float(stats.chi2.ppf(level, 1))
    lo_b, hi_b = problem.phi_bounds
    others = [i for i in range(phi.size) if i != j]
    step0 = se_phi if np.isfinite(se_phi) and se_phi > 0 else 0.1
    step0 = min(step0, 0.5 * (hi_b[j] - lo_b[j]))
    pts: dict[float, float] = {float(phi[j]): best}
    starts: dict[float, Array] = {float(phi[j]): phi[others]}

    def value(v: float, start: Array) -> tuple[float, Array]:
        base = problem.base.copy()
        pj = problem.free[j]
        base[pj] = float(np.exp(v)) if problem.log_mask[j] else v
        sub = replace(problem, free=tuple(problem.free[i] for i in others), base=base)
        p, obj = refit(sub, start)
        return obj, p

    limits = []
    for direction in (-1.0, 1.0):
        v = float(phi[j])
        start = phi[others]
        step = step0
        prev_v, _prev_o = v, best
        found = float("nan")
        for _ in range(max_steps):
            v_new = v + direction * step
            bound = lo_b[j] if direction < 0 else hi_b[j]
            if (direction < 0 and v_new <= bound) or (direction > 0 and v_new >= bound):
                v_new = float(bound)
            obj, start = value(v_new, start)
            pts[v_new] = obj
            starts[v_new] = start
            if obj - best >= thr:
                def g(u: float, s=start) -> float:
                    return value(u, s)[0] - best - thr
                try:
                    found = brentq(g, prev_v, v_new, xtol=1e-4 * max(1.0, abs(v_new)), maxiter=30) \
                        if (g(prev_v) < 0) else v_new
                except ValueError:
                    found = v_new
                break
            if v_new == float(bound):
                break
            prev_v = v_new
            v = v_new
            step *= 1.6
        limits.append(found)
    vs = np.array(sorted(pts))
    objs = np.array([pts[v] for v in vs])
    if problem.log_mask[j]:
        nat = np.exp(vs)
        ci = tuple(float(np.exp(x)) if np.isfinite(x) else float("nan") for x in limits)
    else:
        nat = vs
        ci = tuple(float(x) for x in limits)
    return Profile(problem.names[j], nat, objs, (ci[0], ci[1]), thr)


# -- is the quadratic approximation good enough? ------------------------------------------
@dataclass(frozen=True)
class WaldCheck:
    """−2LL at one end of a parameter's Wald interval, and the confidence level it stands for."""

    index: int
    side: str  # "lower" or "upper"
    rise: float  # −2LL at the interval's end minus the optimum (an upper bound on the profile's)
    expected: float  # the rise the interval assumes there (the profile threshold at its level)
    level: float  # the confidence level of a profile interval ending where −2LL has risen by ``rise``


def check_wald_intervals(problem: Problem, phi: Array, eta: Array, unc: Uncertainty, best: float,
                         level: float = 0.95) -> list[WaldCheck]:
    """Evaluate −2LL at both ends of every Wald interval.

    The other parameters follow the conditional mean path ``φ + cov[:, j]/cov[j, j]·δ`` (the
    profile path of a quadratic likelihood; clipped to the bounds), error parameters at their
    estimate or their moment values, whichever gives the lower value; no refits, so the rise
    found is an upper bound on the profile likelihood's rise at that point. Two simulations
    per parameter. The rise is turned into the level of the profile interval that would end
    there (the inverse of ``n·log(1 + t²/df)``, see ``profile_parameter``): an end whose level
    is well below the nominal one sits inside the region the data support, so the Wald
    interval is too narrow on that side (e.g. an absorption rate constant whose absorption
    phase was not sampled: the likelihood is nearly flat above the estimate).
    """
    n, df, q = problem.n_obs, unc.df, unc.quantile
    if df < 1 or not np.isfinite(q) or unc.singular:
        return []
    expected = float(n * np.log1p(q * q / df))
    y, cens, idx, err = problem.values, problem.censored, problem.obs_index, problem.error
    floor = problem.floor
    lo_b, hi_b = problem.phi_bounds
    out = []
    for j in range(phi.size):
        if not (np.isfinite(unc.se_phi[j]) and unc.se_phi[j] > 0):
            continue
        path = unc.cov_phi[:, j] / unc.cov_phi[j, j]
        for side, sign in (("lower", -1.0), ("upper", 1.0)):
            p = phi + sign * q * unc.se_phi[j] * path
            if not lo_b[j] <= p[j] <= hi_b[j]:
                continue  # the interval leaves the template's bounds: the bound warning covers it
            p = np.clip(p, lo_b, hi_b)
            try:
                with np.errstate(all="ignore"):
                    at_moments, _, f = problem.moment_objective(p)
                    at_estimate = neg2ll(err, y, f, eta, idx, cens, floor).value
            except CompartmentsError:
                continue
            rise = float(np.nanmin([at_estimate, at_moments])) - best
            if not np.isfinite(rise):
                continue
            with np.errstate(over="ignore"):
                t2 = df * np.expm1(max(rise, 0.0) / n)
            out.append(WaldCheck(j, side, rise, expected, float(2 * stats.t.cdf(np.sqrt(t2), df) - 1)))
    return out
