"""First-order conditional estimation with interaction (FOCE-I).

The marginal likelihood of subject ``i`` is approximated at its conditional mode ``η̂_i``
(:mod:`.ebe`) by Laplace's method with the first-order (Gauss–Newton) Hessian of the
conditional likelihood, the residual variance taken at ``η̂_i`` (the interaction):

    −2 log L_i ≈ l_i(η̂_i) + log|Ω| + log|M_i|,   M_i = G_iᵀ W_i G_i + Ω⁻¹,

with ``G_i = ∂f/∂η`` from the simulator's exact sensitivities and ``W_i`` the per-row
weights of :mod:`.residual` (Lindstrom & Bates 1990, Biometrics 46:673; Beal & Sheiner,
first-order conditional estimation with interaction; Wang 2007, J Pharmacokinet
Pharmacodyn 34:575 for the formulas). For a model linear in η with constant residual
variance this is the exact likelihood of the linear mixed model.

Gradient
    Exact, by the envelope theorem and implicit differentiation of the mode:
    ``dη̂/dx = −H⁻¹ ∂²l/∂η∂x`` with ``H = ∂²l/∂η²``. The second derivatives of the
    predictions that ``H``, ``∂M/∂η`` and the cross terms need come from central
    differences of the exact first-order sensitivities in the q random directions (a smooth,
    deterministic function: no inner optimisation is differenced). The outer problem is
    solved by L-BFGS-B on this gradient.
Covariance
    The inverse of half the Hessian of the objective (``−2 log L``), the Hessian by central
    differences of the exact gradient; or the sandwich ``R⁻¹ S R⁻¹`` with ``S`` the sum of
    the subjects' outer score products (White 1982, Econometrica 50:1).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import minimize

from .design import Design
from .ebe import Modes, Point, evaluate, solve_modes
from .evaluate import Evaluator
from .model import PopulationModel
from .residual import Terms, terms

Array = NDArray[np.float64]

#: Relative step of the central differences of the sensitivities.
SECOND_ORDER_STEP = 1e-4


@dataclass(frozen=True)
class Objective:
    """FOCE-I objective at x, with its exact gradient and what the diagnostics need."""

    value: float
    gradient: Array
    per_subject: Array  # (N,) −2 log L_i
    subject_gradients: Array  # (N, size)
    modes: Modes
    m: Array  # (N, p) typical values per subject
    M: Array  # (N, q, q) FOCE-I precision of η̂ (½ of the approximate Hessian of l)
    converged: bool


def _second_derivatives(pm: PopulationModel, design: Design, ev: Evaluator, m: Array, s: Array,
                        omega_inv: Array, point: Point) -> Array:
    """∂J/∂ψ_r for every random direction r: (N, n, p, q), by central differences."""
    N = design.n_subjects
    idx = np.arange(N)
    out = np.zeros(point.J.shape + (pm.q,))  # type: ignore[union-attr]
    for r in range(pm.q):
        k = pm.random[r]
        h = SECOND_ORDER_STEP * np.maximum(1.0, np.abs(point.psi[:, k]))
        e = np.zeros((N, pm.q))
        e[:, r] = h
        plus = evaluate(pm, design, ev, m, s, omega_inv, point.eta + e, idx, order=1)
        minus = evaluate(pm, design, ev, m, s, omega_inv, point.eta - e, idx, order=1)
        out[..., r] = (plus.J - minus.J) / (2 * h[:, None, None])  # type: ignore[operator]
    return out


def foce_objective(pm: PopulationModel, design: Design, ev: Evaluator, x: Array, eta0: Array,
                   *, gradient: bool = True, tol: float = 1e-9) -> Objective:
    """The FOCE-I objective (−2 log-likelihood) at ``x`` and its gradient (``tol``: of the modes)."""
    N = design.n_subjects
    R = list(pm.random)
    u = pm.unpack(x)
    s = u.s
    m, dm = pm.typical(x, N)
    omega = pm.omega(x)
    oi = np.linalg.inv(omega)
    modes = solve_modes(pm, design, ev, m, s, omega, eta0, tol=tol)
    pt = modes.point
    if not gradient:
        pt = evaluate(pm, design, ev, m, s, oi, pt.eta, np.arange(N), order=1)
    T2 = terms(pm.residual, design.rows, pt.f, s, order=2)
    J = pt.J
    assert J is not None and T2.w is not None
    G = J[:, :, R]
    M = np.einsum("bnq,bn,bnr->bqr", G, T2.w, G) + oi[None]
    sign_o, logdet_o = np.linalg.slogdet(omega)
    sign_m, logdet_m = np.linalg.slogdet(M)
    per = pt.value + logdet_o + logdet_m
    per = np.where(np.isfinite(per) & (sign_m > 0), per, np.inf)
    value = float(per.sum()) if sign_o > 0 else float("inf")
    if not gradient or not np.isfinite(value):
        return Objective(value, np.full(pm.size, np.nan), per, np.zeros((N, pm.size)), modes, m, M,
                         bool(modes.converged.all()))
    K = _second_derivatives(pm, design, ev, m, s, oi, pt)  # (N, n, p, q)
    grad = _gradient(pm, pt, T2, G, K, M, dm, pm.domega(x), oi)
    return Objective(value, grad.sum(axis=0), per, grad, modes, m, M, bool(modes.converged.all()))


def _gradient(pm: PopulationModel, pt: Point, T2: Terms, G: Array, K: Array, M: Array, dm: Array,
              dO: Array, oi: Array) -> Array:
    """Per-subject gradient of −2 log L_i in x (N, size)."""
    N = G.shape[0]
    R = list(pm.random)
    J = pt.J
    eta = pt.eta
    Mi = np.linalg.inv(M)
    C = np.einsum("bqr,bnr->bnq", Mi, G)  # M⁻¹ G_j per row
    qj = np.einsum("bnq,bnq->bn", G, C)  # G_jᵀ M⁻¹ G_j
    # d log|M| / dψ (N, p): through w(f) and through J (second derivatives K[..., k, r])
    g_psi = np.einsum("bn,bnk,bn->bk", T2.w_f, J, qj) + 2 * np.einsum("bn,bnkr,bnr->bk", T2.w, K, C)
    # d l / dψ at fixed η (N, p) and exact Hessians in the random directions
    l_psi = np.einsum("bn,bnk->bk", T2.t_f, J)
    H_psi_R = np.einsum("bnr,bn,bnk->brk", G, T2.t_ff, J) + np.einsum("bn,bnkr->brk", T2.t_f, K)  # (N, q, p)
    H = H_psi_R[:, :, R] + 2 * oi[None]
    v = _solve(H, g_psi[:, R])  # (N, q)
    sm, sb, sl, ss = pm.slices
    out = np.zeros((N, pm.size))
    # typical values and covariate effects
    direct_mb = np.einsum("bk,bkj->bj", l_psi + g_psi, dm)
    cross_mb = np.einsum("br,brk,bkj->bj", v, H_psi_R, dm)
    out[:, sm.start:sb.stop] = direct_mb - cross_mb
    # error parameters
    direct_s = T2.t_s.sum(axis=1) + np.einsum("bne,bn->be", T2.w_s, qj)
    cross_s = np.einsum("br,bnr,bne->be", v, G, T2.t_fs)
    out[:, ss] = direct_s - cross_s
    # Cholesky entries of Ω: l through ηᵀΩ⁻¹η, log|Ω|, log|M| through Ω⁻¹, and η̂ through 2Ω⁻¹η
    dinv = -np.einsum("ij,ajk,kl->ail", oi, dO, oi)  # ∂Ω⁻¹ (n_chol, q, q)
    direct_l = (np.einsum("bi,aij,bj->ba", eta, dinv, eta) + np.einsum("ij,aji->a", oi, dO)[None]
                + np.einsum("bij,aji->ba", Mi, dinv))
    cross_l = 2 * np.einsum("br,arj,bj->ba", v, dinv, eta)
    out[:, sl] = direct_l - cross_l
    return out


def _solve(H: Array, b: Array) -> Array:
    try:
        return np.linalg.solve(H, b[..., None])[..., 0]
    except np.linalg.LinAlgError:
        return np.einsum("bij,bj->bi", np.linalg.pinv(H), b)


@dataclass(frozen=True)
class FoceFit:
    """Outcome of the outer optimisation."""

    x: Array
    objective: Objective
    iterations: int
    evaluations: int
    converged: bool
    message: str


def fit_foce(pm: PopulationModel, design: Design, ev: Evaluator, x0: Array, *, max_iter: int = 500,
             gtol: float = 1e-6, trace: list | None = None) -> FoceFit:
    """Minimise the FOCE-I objective from ``x0`` (L-BFGS-B with the exact gradient).

    The modes of each evaluation start from those of the best point so far, so that the
    sequence of evaluations, and so the result, is deterministic.
    """
    state = {"eta": np.zeros((design.n_subjects, pm.q)), "best": np.inf, "n": 0}
    cache: dict[bytes, Objective] = {}
    bounds = pm.bounds()

    def fun(x: Array) -> tuple[float, Array]:
        key = x.tobytes()
        if key not in cache:
            cache.clear()
            try:
                o = foce_objective(pm, design, ev, x, state["eta"])
            except (np.linalg.LinAlgError, FloatingPointError, ValueError):  # an impossible point: no value
                N = design.n_subjects
                o = Objective(float("inf"), np.full(pm.size, np.nan), np.full(N, np.inf), np.zeros((N, pm.size)),
                              None, np.zeros((N, pm.p)), np.zeros((N, pm.q, pm.q)), False)  # type: ignore[arg-type]
            state["n"] += 1
            if np.isfinite(o.value) and o.value < state["best"] and o.modes is not None:
                state["best"] = o.value
                state["eta"] = o.modes.point.eta.copy()
            cache[key] = o
            if trace is not None:
                trace.append((state["n"], o.value))
        o = cache[key]
        if not np.isfinite(o.value):
            return 1e300, np.zeros(pm.size)
        return o.value, o.gradient

    x0 = np.clip(np.asarray(x0, dtype=float), [b[0] for b in bounds], [b[1] for b in bounds])
    res = minimize(fun, x0, jac=True, method="L-BFGS-B", bounds=bounds,
                   options={"maxiter": max_iter, "maxfun": 3 * max_iter, "ftol": 1e-12, "gtol": gtol,
                            "maxcor": 30})
    x = np.asarray(res.x, dtype=float)
    final = foce_objective(pm, design, ev, x, state["eta"])
    gnorm = float(np.max(np.abs(_projected(final.gradient, x, bounds))))
    ok = bool(np.isfinite(final.value) and (res.success or gnorm < 1e-3))
    msg = str(res.message)
    return FoceFit(x, final, int(res.nit), state["n"], ok, msg)


def _projected(g: Array, x: Array, bounds: list[tuple[float, float]]) -> Array:
    """The gradient with components pushing against an active bound set to zero."""
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    out = g.copy()
    out[(x <= lo + 1e-10) & (g > 0)] = 0.0
    out[(x >= hi - 1e-10) & (g < 0)] = 0.0
    return out
