"""Stage 2: maximum likelihood on the exact model solution (scipy).

Two steps from each start:

1. **Weighted least squares** (``scipy.optimize.least_squares``, trust-region reflective,
   bounds on the working scale, exact sensitivity Jacobian). Weights come from the error
   model evaluated at the previous iterate (iteratively reweighted); censored values
   contribute only when the prediction rises above the LLOQ. For additive error on one
   observable without censoring this *is* the maximum-likelihood estimate (ordinary
   least squares) and nothing more is done.
2. **Joint polish** of the structural and error parameters on the exact −2 log-likelihood
   (``scipy.optimize.minimize``, L-BFGS-B, analytic gradient), kept only if it improves
   the objective.

The best result over all starts is returned.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import least_squares, minimize

from ..errors import CompartmentsError, SimulationError
from .derivatives import hessian
from .likelihood import _sd, initial_eta, n_error_parameters, neg2ll
from .problem import Problem
from .stages import StageResult

Array = NDArray[np.float64]


def is_plain_least_squares(problem: Problem) -> bool:
    """True when the likelihood fit reduces to ordinary least squares."""
    return (
        problem.error == "additive"
        and np.unique(problem.obs_index).size <= 1
        and not bool(np.any(problem.censored))
    )


def profiled_form(problem: Problem) -> str | None:
    """The least-squares form that *is* maximum likelihood with the error SD profiled out.

    ``"ols"`` (additive), ``"log"`` (log-normal: least squares on log values) and
    ``"geometric"`` (proportional: residuals ``(y − f)·G/f`` with ``G`` the geometric mean of
    the predictions, since ``n·log(Σ((y−f)/f)²/n) + 2Σ log f = n·log(Σ((y−f)·G/f)²/n)``), for
    one observable without censoring; None otherwise (then reweighting and a joint polish).
    """
    if np.unique(problem.obs_index).size > 1 or bool(np.any(problem.censored)):
        return None
    return {"additive": "ols", "lognormal": "log", "proportional": "geometric"}.get(problem.error)


#: Tolerance of the least-squares solves inside reweighting rounds (set by ``ROUND_TOL`` in
#: benchmarks to compare; the final joint polish is held to ``tol``).
ROUND_TOL = 1e-8


@dataclass
class _Cache:
    phi: Array | None = None
    f: Array | None = None
    J: Array | None = None
    error: str = ""  # the last reason the model could not be solved


class LikelihoodStage:
    """Maximum-likelihood refinement on the exact solution.

    Parameters
    ----------
    max_nfev : int
        Function evaluations per least-squares solve.
    reweight : int
        Maximum reweighting rounds (error models other than plain additive).
    """

    name = "likelihood"

    def __init__(self, *, max_nfev: int = 400, reweight: int = 8, tol: float = 1e-12):
        self.max_nfev = max_nfev
        self.reweight = reweight
        self.tol = tol

    def run(self, problem: Problem, starts: Sequence[Array]) -> StageResult:
        t0 = time.perf_counter()
        results = []
        failures = []
        seen: list[Array] = []
        for s in starts:
            s = np.asarray(s, dtype=float)
            if any(np.array_equal(s, q) for q in seen):
                continue  # the same start twice gives the same fit
            seen.append(s)
            try:
                results.append(self._from(problem, s))
            except (CompartmentsError, FloatingPointError, np.linalg.LinAlgError, ValueError) as exc:
                failures.append(str(exc))
        wall = time.perf_counter() - t0
        if not results:
            msg = failures[0] if failures else "no starting point"
            return StageResult(self.name, np.asarray(starts[0], dtype=float) if starts else problem.default_phi,
                               (), None, wall, 0, "failed", f"the likelihood fit failed from every start: {msg}")
        results.sort(key=lambda r: r[1])
        phi, obj, eta, nit, ok, msg = results[0]
        if profiled_form(problem) is None or not ok:
            phi, eta, obj, it2, converged = self._newton(problem, phi, eta, obj)
            nit += it2
            if converged and not ok:
                ok, msg = True, "Newton steps on the joint likelihood converged"
            results[0] = (phi, obj, eta, nit, ok, msg)
        cands = tuple(r[0] for r in results)
        return StageResult(
            name=self.name, phi=phi, candidates=cands, objective=obj, wall_time=wall,
            iterations=int(sum(r[3] for r in results)), status="converged" if ok else "stopped",
            message=msg, extra={"eta": eta, "n_starts": len(starts), "n_failed_starts": len(failures),
                                "start_objectives": [float(r[1]) for r in results]},
        )

    # -- one start ---------------------------------------------------------------------
    def _from(self, problem: Problem, phi0: Array) -> tuple[Array, float, Array, int, bool, str]:
        lo, hi = problem.phi_bounds
        span = hi - lo
        phi = np.clip(phi0, lo + 1e-9 * span, hi - 1e-9 * span)
        y = problem.values
        cens = problem.censored
        k = problem.obs_index
        n_kinds = len(problem.model.observable_names)
        err = problem.error
        floor = problem.floor
        pred, cache = _predictor(problem)

        # weights of the first round: per-observable scale (additive, combined), the data
        # themselves (proportional), unit (log-normal works on the log scale)
        sd = np.ones_like(y)
        for j in range(n_kinds):
            m = k == j
            if np.any(m) and err in ("additive", "combined") and n_kinds > 1:
                sd[m] = max(float(np.std(y[m])), floor) or 1.0
        if err == "proportional":
            sd = np.maximum(np.abs(y), floor)
        log = err == "lognormal"
        ly = np.log(np.maximum(y, floor)) if log else y

        form = profiled_form(problem)
        geometric = form == "geometric"

        def resid(p: Array) -> Array:
            f, _ = pred(p)
            if geometric:
                fc = np.maximum(f, floor)
                return (y - f) * np.exp(np.mean(np.log(fc))) / fc
            ft = np.log(np.maximum(f, floor)) if log else f
            r = (ly - ft) / sd
            if np.any(cens):
                r = np.where(cens, np.maximum(ft - ly, 0.0) / sd, r)
            return r

        def jac(p: Array) -> Array:
            f, J = pred(p)
            if geometric:
                fc = np.maximum(f, floor)
                w = np.exp(np.mean(np.log(fc))) / fc
                Jr = np.where((f > floor)[:, None], J / fc[:, None], 0.0)
                return -w[:, None] * J + ((y - f) * w)[:, None] * (Jr.mean(axis=0)[None, :] - Jr)
            Jt = J / np.maximum(f, floor)[:, None] if log else J
            out = -Jt / sd[:, None]
            if np.any(cens):
                ft = np.log(np.maximum(f, floor)) if log else f
                active = cens & (ft > ly)
                out[cens] = np.where(active[cens, None], Jt[cens] / sd[cens, None], 0.0)
            return out

        nit = 0
        ok = True
        msg = ""
        eta = np.zeros(n_kinds * n_error_parameters(err))
        prev = np.inf
        eta_w: Array | None = None
        rounds = 1 if form else self.reweight
        # evaluations for this start, all rounds together: a start far from any optimum
        # stops here instead of crawling through every round (the joint polish follows)
        left = 2 * self.max_nfev
        for _ in range(rounds):
            if left < 1:
                break
            # reweighting rounds only move the weights: a loose solve is enough for them, and
            # the joint polish below ends at the full tolerance
            tol = self.tol if form else max(self.tol, ROUND_TOL)
            try:
                with np.errstate(all="ignore"):
                    sol = least_squares(resid, phi, jac=jac, bounds=(lo, hi), method="trf", x_scale="jac",
                                        xtol=tol, ftol=tol, gtol=tol, max_nfev=min(self.max_nfev, left))
            except ValueError:
                if cache.error:  # say why the model could not be solved, not scipy's symptom
                    raise SimulationError(f"{cache.error} (at the starting values)") from None
                raise
            left -= int(sol.nfev)
            if sol.status == 0 and left >= 1:  # evaluation limit: restart once with a fresh trust region
                nit += int(sol.nfev)
                with np.errstate(all="ignore"):
                    sol = least_squares(resid, sol.x, jac=jac, bounds=(lo, hi), method="trf", x_scale="jac",
                                        xtol=tol, ftol=tol, gtol=tol, max_nfev=min(self.max_nfev, left))
                left -= int(sol.nfev)
            phi = sol.x
            nit += int(sol.nfev)
            # converged: a tolerance was met, or the gradient vanishes at the limit
            ok = sol.status > 0 or float(sol.optimality) <= 1e-8 * (1.0 + 2.0 * float(sol.cost))
            msg = sol.message
            f, _ = pred(phi)
            eta = initial_eta(err, y, f, k, cens, n_kinds, floor)
            obj = neg2ll(err, y, f, eta, k, cens, floor).value
            if rounds == 1 or abs(prev - obj) <= 1e-8 * (1 + abs(obj)):
                break
            prev = obj
            # damped on the log scale: undamped weights can flip between two observables
            # round after round without settling (seen on predator–prey with both counted)
            eta_w = eta if eta_w is None else 0.5 * (eta_w + eta)
            sdv, _, _ = _sd(err, f, eta_w, k, floor)
            sd = np.maximum(sdv, 1e-300)
        f, _ = pred(phi)
        obj = neg2ll(err, y, f, eta, k, cens, floor).value
        if not form:
            phi, eta, obj, it2, polished = self._polish(problem, phi, eta, obj, pred, floor)
            nit += it2
            if polished and not ok:
                ok, msg = True, "the joint likelihood polish converged"
        if not np.isfinite(obj):
            raise FloatingPointError("the objective is not finite at the solution")
        return phi, float(obj), eta, nit, ok, msg

    def _polish(self, problem: Problem, phi: Array, eta: Array, obj: float, pred, floor: float
                ) -> tuple[Array, Array, float, int, bool]:
        lo, hi = problem.phi_bounds
        nphi = phi.size
        fg = _joint_objective(problem, pred, floor)
        x0 = np.concatenate([phi, eta])
        bounds = list(zip(lo, hi, strict=False)) + [(e - 25.0, e + 25.0) for e in eta]
        with np.errstate(all="ignore"):
            res = minimize(fg, x0, jac=True, method="L-BFGS-B", bounds=bounds,
                           options={"maxiter": 200, "ftol": 1e-13, "gtol": 1e-9})
        if np.isfinite(res.fun) and res.fun < obj:
            return res.x[:nphi], res.x[nphi:], float(res.fun), int(res.nit), bool(res.success)
        return phi, eta, obj, int(res.nit), bool(res.success)

    def _newton(self, problem: Problem, phi: Array, eta: Array, obj: float
                ) -> tuple[Array, Array, float, int, bool]:
        """Newton steps on the joint likelihood from the best start (see ``newton_polish``)."""
        lo, hi = problem.phi_bounds
        nphi = phi.size
        pred, _ = _predictor(problem)
        fg = _joint_objective(problem, pred, problem.floor)
        x = np.concatenate([phi, eta])
        with np.errstate(all="ignore"):
            x, fx, nit, converged = newton_polish(fg, x, obj, np.r_[lo, eta - 25.0], np.r_[hi, eta + 25.0])
        return x[:nphi], x[nphi:], fx, nit, converged


def _predictor(problem: Problem):
    """Predictions and Jacobian at ``phi``, remembered for the last ``phi`` asked."""
    cache = _Cache()
    n = problem.values.size

    def pred(p: Array) -> tuple[Array, Array]:
        if cache.phi is None or not np.array_equal(cache.phi, p):
            try:
                f, J = problem.predict(p, jacobian=True)
                if not (np.all(np.abs(f) < 1e100) and np.all(np.abs(J) < 1e100)):
                    raise SimulationError("predictions out of range")
            except SimulationError as exc:
                # the trust region shrinks on non-finite residuals; the step is rejected
                cache.error = str(exc)
                f, J = np.full(n, np.nan), np.zeros((n, p.size))
            cache.phi, cache.f, cache.J = p.copy(), f, J
        assert cache.f is not None and cache.J is not None
        return cache.f, cache.J

    return pred, cache


def _joint_objective(problem: Problem, pred, floor: float):
    """``x = [phi, eta] -> (−2LL, gradient)``; 1e300 where the model cannot be solved."""
    y, cens, k, err = problem.values, problem.censored, problem.obs_index, problem.error
    nphi = problem.n_free

    def fg(x: Array) -> tuple[float, Array]:
        p, e = x[:nphi], x[nphi:]
        try:
            f, J = pred(p)
        except CompartmentsError:
            return 1e300, np.zeros_like(x)
        t = neg2ll(err, y, f, e, k, cens, floor)
        if not np.isfinite(t.value):
            return 1e300, np.zeros_like(x)
        return t.value, np.concatenate([J.T @ t.d_f, t.d_eta])

    return fg


def newton_polish(fg, x: Array, fx: float, lo: Array, hi: Array, max_iter: int = 12
                  ) -> tuple[Array, float, int, bool]:
    """Damped Newton steps on ``fg(x) -> (value, gradient)`` from ``x`` within [lo, hi].

    The Hessian comes from central differences of the analytic gradient. A quasi-Newton
    method stops short of the optimum on long curved valleys (measured on predator–prey with
    both species counted: −2LL 0.01–0.1 above the best of a 50-start multistart); a few
    Newton steps converge quadratically there. Steps are Levenberg-damped until they lower
    the value; the loop ends when the Hessian is positive definite and the predicted decrease
    is below 1e-10 (converged: a local minimum), when two steps in a row change the value by
    less than 1e-9 relative (converged in the objective along a flat valley; the parameters
    that move along it are then flagged by the uncertainty step), when no damping helps, or
    after ``max_iter`` steps.
    """
    def grad(z: Array) -> Array:
        return fg(z)[1]

    nit = 0
    flat = 0  # accepted steps in a row that changed the value by less than 1e-9 (relative)
    for nit in range(1, max_iter + 1):
        g = grad(x)
        H = hessian(grad, x)
        if not (np.all(np.isfinite(g)) and np.all(np.isfinite(H))):
            return x, fx, nit, False
        scale = max(float(np.max(np.abs(np.diag(H)))), 1e-12)
        lam = 0.0
        moved = False
        for _ in range(12):
            try:
                step = -np.linalg.solve(H + lam * scale * np.eye(x.size), g)
            except np.linalg.LinAlgError:
                lam = max(lam * 10, 1e-8)
                continue
            predicted = -(g @ step + 0.5 * step @ H @ step)
            if lam == 0.0 and 0 <= predicted < 1e-10 * (1 + abs(fx)) and _positive_definite(H):
                return x, fx, nit, True
            xn = np.clip(x + step, lo, hi)
            fn = fg(xn)[0]
            if np.isfinite(fn) and fn < fx:
                flat = flat + 1 if fx - fn < 1e-9 * (1 + abs(fx)) else 0
                x, fx, moved = xn, float(fn), True
                break
            lam = max(lam * 10, 1e-8)
        if not moved:
            return x, fx, nit, False
        if flat >= 2:  # the value has settled along a flat valley: converged in the objective
            return x, fx, nit, True
    return x, fx, nit, False


def _positive_definite(H: Array) -> bool:
    try:
        np.linalg.cholesky(H)
    except np.linalg.LinAlgError:
        return False
    return True
