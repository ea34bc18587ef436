"""Predictions per observation, shrinkage and the warnings of a population fit.

Per observation (all on the scale the error acts on: ``log`` under log-normal error):

* population prediction ``PRED = f(θ_typical(c_i))`` (η = 0) and individual prediction
  ``IPRED = f(θ̂_i)`` at the individual estimate;
* ``IWRES = (y − IPRED)/σ(IPRED)``;
* ``CWRES``: the observations decorrelated with the FOCE linearisation at the individual
  estimate, ``C_i^{-1/2}(y_i − f(η̂_i) + G_i η̂_i)`` with ``C_i = G_i Ω G_iᵀ + Σ_i`` (Hooker,
  Staatz & Karlsson 2007, Pharm Res 24:2187), ``C^{-1/2}`` the inverse Cholesky factor;
* ``NPDE``: each subject's data simulated ``draws`` times from the model (new η and new
  residuals), observed and simulated vectors decorrelated with the Cholesky factor of the
  simulated covariance, the prediction discrepancy the share of simulated values below the
  observed one, then ``Φ⁻¹`` (Brendel et al. 2006, Pharm Res 23:2036; Comets et al. 2008).

Censored rows have no residuals (nan): their values are limits, not measurements.

Shrinkage (Savic & Karlsson 2009, AAPS J 11:558): ``1 − SD(η̂_r)/ω_r`` per random effect,
``1 − SD(IWRES)`` for the residuals.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.typing import NDArray
from scipy import stats

from .design import Design
from .evaluate import Evaluator
from .model import PopulationModel

Array = NDArray[np.float64]

SHRINKAGE_LIMIT = 30.0
CORRELATION_LIMIT = 0.95
#: A random effect whose SD is below this is reported as near zero (log scale: 1 % CV).
NEAR_ZERO_SD = 0.01


def _scale(pm: PopulationModel, v: Array) -> Array:
    return pm.residual.transform(v)[0]


def predictions_table(pm: PopulationModel, design: Design, ev: Evaluator, x: Array, eta: Array,
                      rng: np.random.Generator, draws: int = 500) -> pd.DataFrame:
    """One row per observation: time, value, censored, PRED, IPRED, IWRES, CWRES, NPDE."""
    N = design.n_subjects
    idx = np.arange(N)
    m, _ = pm.typical(x, N)
    s = pm.unpack(x).s
    omega = pm.omega(x)
    th0, _ = pm.theta(m)
    pred, _ = ev(th0, idx)
    psi = pm.psi(m, eta)
    th, dth = pm.theta(psi)
    ipred, J = ev(th, idx, jacobian=True)
    G = J[:, :, [pm.free[j] for j in pm.random]] * dth[:, None, list(pm.random)]
    k = design.obs_index
    sd = pm.residual.sd(ipred, s, k).sd
    y_u = _scale(pm, design.values)
    ip_u, u_f, _ = pm.residual.transform(ipred)
    quant = design.mask & ~design.censored
    iwres = np.where(quant, (y_u - ip_u) / sd, np.nan)
    cwres = np.full(design.mask.shape, np.nan)
    npde = np.full(design.mask.shape, np.nan)
    Gu = G * u_f[..., None]
    sims = simulate_replicates(pm, design, ev, x, rng, draws)  # (draws, N, n_max) on the error scale
    for i in range(N):
        rows = np.flatnonzero(quant[i])
        if rows.size == 0:
            continue
        Gi = Gu[i, rows]
        C = Gi @ omega @ Gi.T + np.diag(sd[i, rows] ** 2)
        mean_lin = ip_u[i, rows] - Gi @ eta[i]
        cwres[i, rows] = _decorrelate(C, y_u[i, rows] - mean_lin)
        ys = sims[:, i, rows]
        ys = ys[np.all(np.isfinite(ys), axis=1)]
        if ys.shape[0] < 10:
            continue
        mu = ys.mean(axis=0)
        Cs = np.atleast_2d(np.cov(ys, rowvar=False))
        obs_d = _decorrelate(Cs, y_u[i, rows] - mu)
        sim_d = np.array([_decorrelate(Cs, v - mu) for v in ys])
        pde = (sim_d < obs_d[None, :]).mean(axis=0)
        K = ys.shape[0]
        pde = np.clip(pde, 1.0 / (2 * K), 1 - 1.0 / (2 * K))
        npde[i, rows] = stats.norm.ppf(pde)
    mask = design.mask
    return pd.DataFrame({
        "subject": np.repeat(np.array(design.ids, dtype=object), mask.sum(axis=1)),
        "time": design.flat(design.times),
        "observable": [pm.model.observable_names[j] for j in design.flat(k)],
        "value": design.flat(design.values),
        "censored": design.flat(design.censored),
        "population_prediction": design.flat(pred),
        "individual_prediction": design.flat(ipred),
        "iwres": design.flat(iwres),
        "cwres": design.flat(cwres),
        "npde": design.flat(npde),
    })


def _decorrelate(C: Array, r: Array) -> Array:
    try:
        L = np.linalg.cholesky(C)
    except np.linalg.LinAlgError:
        w, v = np.linalg.eigh(C)
        L = v * np.sqrt(np.maximum(w, 1e-300))
    return np.linalg.solve(L, r)


def simulate_replicates(pm: PopulationModel, design: Design, ev: Evaluator, x: Array, rng: np.random.Generator,
              draws: int) -> Array:
    """Replicates of every subject's data on the error scale (draws, N, n_max): new random
    effects and new residuals at the estimate ``x`` (for NPDE; a visual predictive check
    can use it with a design from :func:`compartments.population.fit.prepare`)."""
    N = design.n_subjects
    m, _ = pm.typical(x, N)
    s = pm.unpack(x).s
    L = np.linalg.cholesky(pm.omega(x))
    out = np.empty((draws, N) + design.mask.shape[1:])
    chunk = max(1, 20000 // max(N, 1))
    for a in range(0, draws, chunk):
        b = min(draws, a + chunk)
        eta = rng.standard_normal((b - a, N, pm.q)) @ L.T
        psi = pm.psi(np.broadcast_to(m, (b - a, N, pm.p)).reshape(-1, pm.p), eta.reshape(-1, pm.q))
        th, _ = pm.theta(psi)
        f, _ = ev(th, np.tile(np.arange(N), b - a))
        f = f.reshape(b - a, N, -1)
        k = np.broadcast_to(design.obs_index, f.shape)
        sd = pm.residual.sd(f, s, k).sd
        out[a:b] = _scale(pm, f) + sd * rng.standard_normal(f.shape)
    return out


def shrinkage(pm: PopulationModel, x: Array, eta: Array, iwres: Array) -> dict[str, float]:
    """η-shrinkage (%) per random effect and ε-shrinkage (%) as ``"residual"``."""
    om = pm.omega(x)
    out = {}
    for r, n in enumerate(pm.random_names):
        sd = float(np.std(eta[:, r], ddof=1)) if eta.shape[0] > 1 else float("nan")
        out[n] = 100.0 * (1.0 - sd / float(np.sqrt(om[r, r])))
    w = iwres[np.isfinite(iwres)]
    out["residual"] = 100.0 * (1.0 - float(np.std(w, ddof=1))) if w.size > 1 else float("nan")
    return out


def warnings_for(pm: PopulationModel, x: Array, *, converged: bool, why: str, shrink: dict[str, float],
                 correlation: Array, labels: tuple[str, ...], covariance_failed: str,
                 no_quantified: list[str], at_bound: list[str]) -> list[str]:
    """The plain sentences of a population fit."""
    out: list[str] = []
    if not converged:
        out.append(f"The estimation did not converge ({why}); the numbers are where it stopped, not estimates. "
                   "Run it longer, simplify the model (fewer random effects) or check the data.")
    om = pm.omega(x)
    for r, n in enumerate(pm.random_names):
        sd = float(np.sqrt(om[r, r]))
        kind = pm.kinds[r]
        typical = pm.natural(pm.unpack(x).mu)[pm.random[r]]
        small = sd < NEAR_ZERO_SD if kind == "lognormal" else sd < NEAR_ZERO_SD * abs(typical)
        if small:
            out.append(f"The between-subject variability of {n} is near zero (SD of its random effect {sd:.2g}): "
                       f"the data do not support a random effect on {n}; consider removing it.")
    for n, v in shrink.items():
        if n != "residual" and np.isfinite(v) and v > SHRINKAGE_LIMIT:
            out.append(f"The individual estimates of {n} shrink {v:.0f} % towards the typical value "
                       f"(more than {SHRINKAGE_LIMIT:.0f} %): plots and covariate searches built on them are "
                       "unreliable (Savic & Karlsson 2009).")
    if covariance_failed:
        out.append(f"The covariance step failed: {covariance_failed}. Standard errors and intervals are not available.")
    else:
        k = correlation.shape[0]
        for i in range(k):
            for j in range(i + 1, k):
                c = correlation[i, j]
                if np.isfinite(c) and abs(c) > CORRELATION_LIMIT:
                    out.append(f"The estimates of {labels[i]} and {labels[j]} are strongly correlated (r = {c:+.3f}): "
                               "the data may determine only a combination of them.")
    for b in at_bound:
        out.append(b)
    if no_quantified:
        shown = ", ".join(no_quantified[:10]) + (" ..." if len(no_quantified) > 10 else "")
        out.append(f"{len(no_quantified)} subject(s) have no quantified observation ({shown}): they enter only "
                   "through the limit of quantification and carry little information.")
    return out


def bound_sentences(pm: PopulationModel, x: Array) -> list[str]:
    """Typical values at the template's range and covariate effects at their bounds."""
    out = []
    bounds = pm.bounds()
    sm, sb, _, _ = pm.slices
    for j, n in enumerate(pm.names):
        lo, hi = bounds[j]
        tol = 1e-6 * max(1.0, hi - lo)
        if x[j] - lo <= tol or hi - x[j] <= tol:
            side = "lower" if x[j] - lo <= tol else "upper"
            out.append(f"The typical value of {n} is at its {side} bound in the template: the data do not pin it "
                       "down inside the template's range; check the data and units, or widen the range in a user "
                       "template.")
    j = sb.start
    for e in pm.effects:
        for a, lab in enumerate(e.labels):
            lo, hi = e.bounds()[a]
            tol = 1e-6 * max(1.0, hi - lo)
            if x[j] - lo <= tol or hi - x[j] <= tol:
                out.append(f"The covariate effect {lab} ({e.form}) is at its bound: the data push it to the edge "
                           "of what the form allows; try another form or check the covariate's values.")
            j += 1
    return out
