"""The estimator: strategies that chain the stages, then uncertainty and plain warnings.

Strategies
    ``"hybrid"`` (default): the physics-informed network stage proposes parameters with no
    user start values; the likelihood stage refines its candidates and the template
    defaults, keeping the best. ``"nls"``: the likelihood stage from the template defaults
    only. ``"network"``: the network stage alone (its parameters, with the uncertainty
    evaluated there). ``"multistart"``: ``n_starts`` (50) scrambled Sobol points over the
    bounds are scored by the objective; the likelihood stage starts from the defaults and
    the best eight of them (a slow reference).
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import replace
from importlib.metadata import PackageNotFoundError, version
from typing import Any

import numpy as np
import sympy as sp
from numpy.typing import NDArray
from scipy.stats import qmc

from ..errors import CompartmentsError, FitError, UsageError
from ..model import compiled
from ..results import DerivedValue, FitResult, Residuals
from ..template import Template
from .likelihood import _sd, error_parameter_names, neg2ll
from .nls import LikelihoodStage, is_plain_least_squares
from .problem import Problem, make_problem, set_aside_zero_predictions
from .stages import StageResult
from .uncertainty import Uncertainty, check_wald_intervals, estimate_uncertainty, profile_parameter

Array = NDArray[np.float64]

STRATEGIES = ("hybrid", "nls", "network", "multistart")
#: A Wald interval end whose likelihood level falls this far below the nominal one is flagged.
WALD_SLACK = 0.05
#: A Wald interval end whose −2LL is this much below the estimate's shows the fit stopped short.
STOPPED_SHORT = 1e-3
RSE_LIMIT = 50.0
CORR_LIMIT = 0.95
MULTISTART_REFINE = 8


def _versions() -> dict[str, str]:
    out = {}
    for pkg in ("compartments", "numpy", "scipy", "sympy", "torch"):
        try:
            out[pkg] = version(pkg)
        except PackageNotFoundError:
            out[pkg] = "not installed"
    return out


def _subjects(data: Any, pooled: bool) -> tuple[list[Any], str]:
    if hasattr(data, "subjects") and hasattr(data, "ids"):
        subs = list(data.subjects)
        if not pooled and len(subs) != 1:
            raise UsageError(
                "fit() got a whole study; pass pooled=True for one parameter set across all "
                "subjects, or fit subjects one by one (study['id']) or with compartments.cohort"
            )
        return subs, ("pooled" if pooled else str(subs[0].id))
    if isinstance(data, (list, tuple)):
        if not pooled and len(data) != 1:
            raise UsageError("several subjects need pooled=True")
        return list(data), ("pooled" if pooled or len(data) != 1 else str(data[0].id))
    return [data], str(data.id)


def needs_doses(template: Template) -> bool:
    """True when every state of ``template`` starts at zero and only doses can move it.

    Such a model predicts nothing but zeros for a subject without doses.

    Examples
    --------
    >>> from compartments import load_template
    >>> needs_doses(load_template("one-comp-oral")), needs_doses(load_template("predator-prey"))
    (True, False)
    """
    return bool(template.doses) and all(s.initial == 0 for s in template.states)


def failed_result(template: Template | str, subject: str, message: str, *, error: str = "additive",
                  seed: int = 0, strategy: str = "hybrid", stages: tuple[StageResult, ...] = (),
                  wall_time: float = 0.0) -> FitResult:
    """A :class:`FitResult` recording a fit that could not be done, with the reason."""
    name = template if isinstance(template, str) else template.name
    nan = float("nan")
    return FitResult(
        template=name, subject=subject, status="failed", message=message, error_model=error,
        parameter_names=(), units={}, estimates={}, se={}, rse={}, ci={}, fixed={},
        error_parameters={}, covariance=np.zeros((0, 0)), correlation=np.zeros((0, 0)),
        covariance_method="", objective=nan, aic=nan, aicc=nan, bic=nan, n_obs=0, n_params=0,
        residuals=None, derived={}, stages=stages, warnings=(), seed=seed, strategy=strategy,
        versions=_versions(), wall_time=wall_time,
        model_template=template if isinstance(template, Template) else None,
    )


def _network_stage(seed: int, options: Mapping[str, Any] | None) -> Any:
    from .pinn import NetworkStage

    return NetworkStage(seed=seed, **dict(options or {}))


def _objective(problem: Problem, phi: Array) -> tuple[float, Array]:
    """−2LL at ``phi`` with moment estimates of the error parameters."""
    value, eta, _ = problem.moment_objective(phi)
    return value, eta


def _flip_flop(problem: Problem, phi: Array, eta: Array, obj: float) -> tuple[Array, dict[str, float] | None]:
    """For a one-compartment oral model (ka, ke, V) return the ka > ke twin and the other."""
    names = problem.names
    t = problem.model.template
    if not ({"ka", "ke", "V"} <= set(names)) or set(t.state_names) != {"depot", "central"}:
        return phi, None
    ia, ie, iv = names.index("ka"), names.index("ke"), names.index("V")
    th = problem.to_theta_free(phi)
    twin = th.copy()
    twin[ia], twin[ie] = th[ie], th[ia]
    twin[iv] = th[iv] * th[ie] / th[ia]
    if not (np.all(twin >= problem.lower) and np.all(twin <= problem.upper)):
        return phi, None
    tphi = problem.to_phi(twin)
    y, cens, k = problem.values, problem.censored, problem.obs_index
    floor = problem.floor
    f, _ = problem.predict(tphi)
    tobj = neg2ll(problem.error, y, f, eta, k, cens, floor).value
    if not abs(tobj - obj) <= 1e-6 * (1 + abs(obj)):
        return phi, None
    if th[ia] >= th[ie]:
        return phi, dict(zip(names, map(float, twin), strict=False))
    return tphi, dict(zip(names, map(float, th), strict=False))


def fit(
    data: Any,
    template: Template | str,
    *,
    error: str = "additive",
    strategy: str = "hybrid",
    seed: int = 0,
    pooled: bool = False,
    profile: bool = False,
    bootstrap: int = 0,
    fixed: Mapping[str, float] | None = None,
    estimate: Sequence[str] = (),
    n_starts: int = 50,
    network: Mapping[str, Any] | None = None,
    level: float = 0.95,
) -> FitResult:
    """Estimate a template's parameters from one subject (or a pooled study).

    Parameters
    ----------
    data : Subject or Study
        A subject (``study["1"]``), or a study / list of subjects with ``pooled=True``.
    template : Template or str
        A template or the name of a shipped / user template.
    error : {"additive", "proportional", "combined", "lognormal"}
    strategy : {"hybrid", "nls", "network", "multistart"}
    seed : int
        Seeds the network stage, multistart and bootstrap.
    pooled : bool
        One parameter set for all subjects' data.
    profile : bool
        Also compute profile-likelihood intervals.
    bootstrap : int
        Number of parametric bootstrap replicates (0: none).
    fixed : mapping, optional
        Parameters held at given values.
    estimate : sequence of str
        Template parameters marked fixed that should be estimated (e.g. ``["tlag"]``).
    n_starts : int
        Number of starts for ``strategy="multistart"``.
    network : mapping, optional
        Settings of the network stage.
    level : float
        Confidence level of the intervals.

    Returns
    -------
    FitResult

    Examples
    --------
    >>> from compartments import fit, load_template, Dose
    >>> from compartments.model import compiled
    >>> from compartments.simulate import simulate
    >>> from types import SimpleNamespace
    >>> import numpy as np
    >>> t = np.array([0.5, 1, 2, 4, 6, 8, 12, 24.])
    >>> m = compiled(load_template("one-comp-oral"))
    >>> y = simulate(m, {"ka": 1.2, "ke": 0.1, "V": 30}, [Dose(0, 300, "oral")], t).observable()
    >>> s = SimpleNamespace(id="a", times=t, values=y, observables=(None,)*8,
    ...                     censored=np.zeros(8, bool), doses=(Dose(0, 300, "oral"),))
    >>> r = fit(s, "one-comp-oral", strategy="nls")
    >>> round(r.estimates["ke"], 4)
    0.1
    """
    t_start = time.perf_counter()
    if strategy not in STRATEGIES:
        raise UsageError(f"strategy must be one of {', '.join(STRATEGIES)}, got {strategy!r}")
    if isinstance(template, str):
        from ..library import load_template

        template = load_template(template)
    subjects, label = _subjects(data, pooled)
    if needs_doses(template) and not any(getattr(s, "doses", ()) for s in subjects):
        raise FitError(
            f"subject {label} has no doses, and without a dose every state of {template.name!r} stays at zero; "
            "give the doses (dose= and route=, or a dose column; command line: --dose AMOUNT --route ROUTE "
            "or --dose-column COL)"
        )
    model = compiled(template)
    problem = make_problem(model, subjects, error=error, fixed=fixed, estimate=estimate)
    n_read = problem.n_obs
    problem, notes = set_aside_zero_predictions(problem)
    n_unc = int(np.sum(~problem.censored))
    if n_unc < problem.n_free:
        k = n_read - problem.n_obs
        left = (f" ({k} sample{' was' if k == 1 else 's were'} at or before the first dose, left out under "
                f"{error} error; combined error keeps {'it' if k == 1 else 'them'})" if k else "")
        raise FitError(
            f"subject {label}: {n_unc} quantified observation(s){left} cannot determine the "
            f"{problem.n_free} parameters of {template.name!r}; use a model with fewer parameters, "
            "fix some (fixed=...), or pool subjects"
        )
    if error == "lognormal" and np.any((problem.values <= 0) & ~problem.censored):
        raise FitError(
            f"subject {label}: log-normal error needs positive values, but some observed values are ≤ 0; "
            "use error='additive' or 'combined', or mark them below the limit of quantification"
        )
    defaults = problem.default_phi
    stages: list[StageResult] = []
    try:
        if strategy == "network":
            net = _network_stage(seed, network).run(problem, [defaults])
            stages.append(net)
            if net.status == "failed":
                return failed_result(template, label, net.message, error=error, seed=seed, strategy=strategy,
                                     stages=tuple(stages), wall_time=time.perf_counter() - t_start)
            phi = net.phi
            obj, eta = _objective(problem, phi)
            ok, msg = True, net.message
        else:
            if strategy == "hybrid":
                net = _network_stage(seed, network).run(problem, [defaults])
                stages.append(net)
                starts = list(net.candidates or (net.phi,)) + [defaults]
            elif strategy == "multistart":
                # screened multistart: n_starts scrambled Sobol points over the bounds are
                # scored by the objective at the point itself; the likelihood fit starts from
                # the defaults and the best MULTISTART_REFINE of them
                lo, hi = problem.phi_bounds
                m = max(int(np.ceil(np.log2(max(n_starts - 1, 1)))), 0)
                sob = qmc.Sobol(d=problem.n_free, scramble=True, seed=seed).random_base2(m)[: max(n_starts - 1, 1)]
                pts = [lo + (hi - lo) * s for s in sob]
                scores = []
                for q in pts:
                    try:
                        scores.append(_objective(problem, q)[0])
                    except CompartmentsError:
                        scores.append(np.inf)
                order = np.argsort(np.where(np.isfinite(scores), scores, np.inf), kind="stable")
                starts = [defaults] + [pts[i] for i in order[:MULTISTART_REFINE]]
            else:
                starts = [defaults]
            lik = LikelihoodStage().run(problem, starts)
            stages.append(lik)
            if lik.status == "failed":
                return failed_result(template, label, lik.message, error=error, seed=seed, strategy=strategy,
                                     stages=tuple(stages), wall_time=time.perf_counter() - t_start)
            phi, obj = lik.phi, float(lik.objective)  # type: ignore[arg-type]
            eta = np.asarray(lik.extra["eta"], dtype=float)
            ok, msg = lik.status == "converged", lik.message
        return _summarise(problem, template, label, phi, eta, obj, ok, msg, tuple(stages), error, seed,
                          strategy, profile, bootstrap, level, t_start, notes)
    except CompartmentsError as exc:
        return failed_result(template, label, str(exc), error=error, seed=seed, strategy=strategy,
                             stages=tuple(stages), wall_time=time.perf_counter() - t_start)


def _summarise(problem: Problem, template: Template, label: str, phi: Array, eta: Array, obj: float,
               converged: bool, msg: str, stages: tuple[StageResult, ...], error: str, seed: int,
               strategy: str, profile: bool, bootstrap: int, level: float, t_start: float,
               notes: Sequence[str] = ()) -> FitResult:
    model = problem.model
    warnings: list[str] = list(notes)
    if not converged:
        # a fit that did not converge is recorded as failed (its numbers are not estimates);
        # the point where it stopped is given in the message
        where = ", ".join(f"{n}={v:.4g}" for n, v in zip(problem.names, problem.to_theta_free(phi), strict=False))
        return failed_result(
            template, label,
            f"the likelihood fit did not converge ({msg.rstrip('.')}); it stopped at {where}. "
            "Try strategy 'multistart', fix a parameter, or check the data and units",
            error=error, seed=seed, strategy=strategy, stages=stages,
            wall_time=time.perf_counter() - t_start)
    phi, twin = _flip_flop(problem, phi, eta, obj)
    names = problem.names
    units = {p.name: p.unit for p in template.parameters}
    unc = estimate_uncertainty(problem, phi, eta, level)
    theta = problem.to_theta_free(phi)
    est = {n: float(v) for n, v in zip(names, theta, strict=False)}
    se = {n: float(v) for n, v in zip(names, unc.se, strict=False)}
    rse = {n: (100.0 * se[n] / abs(est[n]) if est[n] != 0 else float("inf")) for n in names}
    ci = {n: (float(lo), float(hi)) for n, (lo, hi) in zip(names, unc.ci, strict=False)}
    fixed_vals = {
        p.name: float(problem.base[i]) for i, p in enumerate(template.parameters) if i not in problem.free
    }
    k_total = problem.n_free + (0 if False else eta.size)
    n = problem.n_obs
    aic = obj + 2 * k_total
    aicc = aic + (2 * k_total * (k_total + 1) / (n - k_total - 1) if n - k_total - 1 > 0 else float("inf"))
    bic = obj + k_total * math.log(max(n, 1))

    # -- warnings, as plain sentences ----------------------------------------------------
    lo, hi = problem.phi_bounds
    for j, nm in enumerate(names):
        tol = 1e-6 * max(1.0, hi[j] - lo[j])
        if phi[j] - lo[j] <= tol or hi[j] - phi[j] <= tol:
            side = "lower" if phi[j] - lo[j] <= tol else "upper"
            bound = problem.lower[j] if side == "lower" else problem.upper[j]
            warnings.append(f"{nm} is at its {side} bound ({bound:g} {units[nm]}): the data do not pin it "
                            "down inside the template's range; check the data or widen the bounds in a user template.")
    if unc.singular:
        bad = ", ".join(names[i] for i in unc.singular)
        warnings.append(f"The Fisher information is singular: {bad} cannot be identified from these data "
                        "(no standard errors); fix a parameter, use a simpler model or add samples.")
    else:
        for nm in names:
            if rse[nm] > RSE_LIMIT:
                warnings.append(f"{nm} is poorly determined (RSE {rse[nm]:.0f} % > {RSE_LIMIT:.0f} %).")
        kk = len(names)
        for i in range(kk):
            for j in range(i + 1, kk):
                c = unc.correlation[i, j]
                if np.isfinite(c) and abs(c) > CORR_LIMIT:
                    warnings.append(f"{names[i]} and {names[j]} are strongly correlated (r = {c:+.3f}); "
                                    "the data may support only a combination of them.")
        for c in check_wald_intervals(problem, phi, eta, unc, obj, level):
            if c.rise < -STOPPED_SHORT:
                warnings.append(
                    f"−2LL at the {c.side} end of the {100 * level:.0f} % interval of {names[c.index]} is "
                    f"{-c.rise:.3g} below its value at the estimate: the fit stopped short of the optimum in that "
                    "direction. Refit with strategy 'multistart', or check the data and the error model."
                )
            elif c.level < level - WALD_SLACK:
                warnings.append(
                    f"The {100 * level:.0f} % interval of {names[c.index]} is too narrow on its {c.side} side: "
                    f"the likelihood rises only {c.rise:.2g} at that end ({c.expected:.2g} expected), which is "
                    f"the edge of a {100 * c.level:.0f} % region at most; the data support values beyond it. "
                    "Use the profile-likelihood interval (profile=True, --profile)."
                )
    if n <= k_total:
        warnings.append(f"Only {n} observations for {k_total} parameters (including the error model): "
                        "no degrees of freedom remain for standard errors.")
    if twin is not None:
        alt = ", ".join(f"{k}={v:.4g}" for k, v in twin.items())
        warnings.append("Flip-flop: ka and ke can swap with an identical fit (oral data alone cannot tell "
                        f"absorption from elimination). The other solution is {alt}; the one with ka > ke "
                        "is reported, the usual assumption for immediate-release oral doses.")

    # -- residuals -----------------------------------------------------------------------
    y, cens, k = problem.values, problem.censored, problem.obs_index
    floor = problem.floor
    f, _ = problem.predict(phi)
    sd, _, _ = _sd(error, f, eta, k, floor)
    if error == "lognormal":
        raw = np.log(np.maximum(y, floor)) - np.log(np.maximum(f, floor))
    else:
        raw = y - f
    if is_plain_least_squares(problem) and n > problem.n_free:
        sd = np.full_like(sd, math.sqrt(float(np.sum(raw**2)) / (n - problem.n_free)))
    obs_names = model.observable_names
    residuals = Residuals(
        subject=tuple(d.id for d in problem.data for _ in range(d.n)),
        time=np.concatenate([d.times for d in problem.data]),
        observable=tuple(obs_names[i] for i in k),
        observed=y, predicted=f, censored=cens, raw=raw, weighted=raw / sd,
    )
    err_names = error_parameter_names(error, obs_names)
    err_vals = {nm: float(np.exp(v)) for nm, v in zip(err_names, eta, strict=False)}
    if is_plain_least_squares(problem) and n > problem.n_free:
        err_vals = {err_names[0]: float(sd[0])}

    derived = _derived(template, problem, phi, unc)
    profiles: dict[str, Any] = {}
    if profile:
        profiles = _profiles(problem, phi, obj, unc)
        for nm, pr in profiles.items():
            if not (np.isfinite(pr.ci[0]) and np.isfinite(pr.ci[1])):
                warnings.append(f"The profile likelihood of {nm} does not rise enough on "
                                f"{'both sides' if not (np.isfinite(pr.ci[0]) or np.isfinite(pr.ci[1])) else 'one side'} "
                                "within the bounds: it is practically non-identifiable from these data.")
    boot: dict[str, Any] = {}
    if bootstrap:
        boot = _bootstrap(problem, phi, eta, bootstrap, seed, level)
        if boot.get("failed"):
            warnings.append(f"{boot['failed']} of {bootstrap} bootstrap refits failed and were left out.")
    return FitResult(
        template=template.name, subject=label, status="ok", message=msg or "", error_model=error,
        parameter_names=names, units=units, estimates=est, se=se, rse=rse, ci=ci, fixed=fixed_vals,
        error_parameters=err_vals, covariance=unc.cov_phi, correlation=unc.correlation,
        covariance_method=unc.method, objective=float(obj), aic=float(aic), aicc=float(aicc),
        bic=float(bic), n_obs=n, n_params=k_total, residuals=residuals, derived=derived,
        stages=stages, warnings=tuple(warnings), seed=seed, strategy=strategy, versions=_versions(),
        wall_time=time.perf_counter() - t_start, alternatives=(twin,) if twin else (),
        log_scale={n: bool(v) for n, v in zip(names, problem.log_mask, strict=False)},
        profiles=profiles, bootstrap=boot,
        doses={d.id: d.doses for d in problem.data}, model_template=template,
    )


def _derived(template: Template, problem: Problem, phi: Array, unc: Uncertainty) -> dict[str, DerivedValue]:
    out: dict[str, DerivedValue] = {}
    if not template.derived:
        return out
    theta = problem.full_theta(phi)
    syms = [sp.Symbol(n, real=True) for n in template.parameter_names]
    by = {s.name: s for s in syms}
    free = list(problem.free)
    dth = np.where(problem.log_mask, theta[free], 1.0)
    for d in template.derived:
        e = d.expression.xreplace({s: by[s.name] for s in d.expression.free_symbols if s.name in by})
        fn = sp.lambdify(syms, [e] + [sp.diff(e, syms[i]) for i in free], modules="numpy")
        try:
            with np.errstate(all="ignore"):
                vals = np.array(fn(*theta), dtype=float)
        except (ZeroDivisionError, OverflowError, TypeError, ValueError):
            continue
        g = vals[1:] * dth
        var = float(g @ unc.cov_phi @ g) if np.all(np.isfinite(unc.cov_phi)) else float("nan")
        out[d.name] = DerivedValue(d.name, float(vals[0]), math.sqrt(var) if var >= 0 else float("nan"),
                                   d.unit, d.description)
    return out


def _refit(sub: Problem, start: Array) -> tuple[Array, float]:
    if sub.n_free == 0:
        obj, _ = _objective(sub, np.zeros(0))
        return np.zeros(0), obj
    r = LikelihoodStage(max_nfev=200).run(sub, [start])
    if r.status == "failed" or r.objective is None:
        return start, float("inf")
    return r.phi, float(r.objective)


def _profiles(problem: Problem, phi: Array, obj: float, unc: Uncertainty) -> dict[str, Any]:
    return {
        problem.names[j]: profile_parameter(problem, phi, obj, j, float(unc.se_phi[j]), _refit, df=unc.df)
        for j in range(problem.n_free)
    }


def _bootstrap(problem: Problem, phi: Array, eta: Array, n_boot: int, seed: int, level: float) -> dict[str, Any]:
    """Parametric bootstrap: simulate from the estimate and its error model, refit."""
    rng = np.random.default_rng(seed)
    k = problem.obs_index
    floor = problem.floor
    f, _ = problem.predict(phi)
    sd, _, _ = _sd(problem.error, f, eta, k, floor)
    lloq = np.concatenate([d.lloq for d in problem.data])
    draws = []
    failed = 0
    for _ in range(int(n_boot)):
        eps = rng.standard_normal(f.size) * sd
        ystar = f * np.exp(eps) if problem.error == "lognormal" else f + eps
        c = np.isfinite(lloq) & (ystar < lloq)
        ystar = np.where(c, lloq, ystar)
        data = []
        i0 = 0
        for d in problem.data:
            sl = slice(i0, i0 + d.n)
            data.append(replace(d, values=ystar[sl], censored=c[sl]))
            i0 += d.n
        sub = replace(problem, data=tuple(data))
        try:
            r = LikelihoodStage(max_nfev=200).run(sub, [phi])
        except CompartmentsError:
            failed += 1
            continue
        if r.status == "failed":
            failed += 1
            continue
        draws.append(problem.to_theta_free(r.phi))
    out: dict[str, Any] = {"n": int(n_boot), "failed": failed}
    if draws:
        arr = np.array(draws)
        a = (1 - level) / 2
        out["samples"] = arr
        out["se"] = dict(zip(problem.names, map(float, arr.std(axis=0, ddof=1) if len(arr) > 1 else np.full(arr.shape[1], np.nan)), strict=False))
        out["ci"] = {nm: (float(np.quantile(arr[:, j], a)), float(np.quantile(arr[:, j], 1 - a)))
                     for j, nm in enumerate(problem.names)}
    return out
