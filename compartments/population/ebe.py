"""Individual (empirical Bayes) estimates: the conditional mode of each subject's η.

For subject ``i`` the estimate minimises

    l_i(η) = Σ_j t_ij(f_ij(ψ_i(η)), s) + ηᵀ Ω⁻¹ η,

``t`` the per-row −2 log-likelihood of :mod:`.residual` (censored rows included), by Fisher
scoring with the exact first-order sensitivities of the simulator: the step solves
``(G_Rᵀ diag(h) G_R + 2Ω⁻¹) δ = −∇l`` with ``G_R = ∂f/∂η`` and ``h`` the expected
information of ``t`` in ``f``, halved until ``l`` decreases. All subjects advance together
(one batched evaluation per step); each stops when its step is below the tolerance.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from .design import Design
from .evaluate import Evaluator
from .model import PopulationModel
from .residual import Terms, terms

Array = NDArray[np.float64]


@dataclass(frozen=True)
class Point:
    """Everything evaluated at one η per subject (batch of B subjects)."""

    eta: Array  # (B, q)
    psi: Array  # (B, p)
    f: Array  # (B, n)
    J: Array | None  # (B, n, p) ∂f/∂ψ
    terms: Terms
    value: Array  # (B,) l_i(η)


def evaluate(pm: PopulationModel, design: Design, ev: Evaluator, m: Array, s: Array, omega_inv: Array,
             eta: Array, index: NDArray[np.int64], order: int = 1) -> Point:
    """``l`` (and, for ``order`` ≥ 1, ∂f/∂ψ and the row terms of that order) at ``eta``."""
    psi = pm.psi(m[index], eta)
    theta, dth = pm.theta(psi)
    F, Jt = ev(theta, index, jacobian=order >= 1)
    J = None
    if Jt is not None:
        J = Jt[:, :, list(pm.free)] * dth[:, None, :]
    rows = design.rows.take(index)
    T = terms(pm.residual, rows, F, s, order=order)
    if J is not None:
        bad = ~np.isfinite(J).all(axis=(1, 2))
        if bad.any():
            T = Terms(np.where(bad[:, None], np.inf, T.t), **{k: v for k, v in T.__dict__.items() if k != "t"})
            J = np.where(np.isfinite(J), J, 0.0)
    value = T.t.sum(axis=1) + np.einsum("bi,ij,bj->b", eta, omega_inv, eta)
    return Point(eta, psi, F, J, T, value)


@dataclass(frozen=True)
class Modes:
    """Conditional modes of all subjects, with the evaluation there."""

    point: Point
    converged: NDArray[np.bool_]
    iterations: int


def solve_modes(pm: PopulationModel, design: Design, ev: Evaluator, m: Array, s: Array, omega: Array,
                eta0: Array, *, tol: float = 1e-7, max_iter: int = 50) -> Modes:
    """Conditional modes η̂ of every subject (Fisher scoring with step halving).

    Parameters
    ----------
    m : (N, p) typical values of each subject on the individual scale
    s : (E,) log error parameters
    omega : (q, q) covariance of the random effects
    eta0 : (N, q) start (the previous modes, or zeros)
    tol : float
        A subject has converged when its largest step component is below ``tol``.
    """
    N = design.n_subjects
    R = list(pm.random)
    oi = np.linalg.inv(omega)
    idx = np.arange(N)
    cur = evaluate(pm, design, ev, m, s, oi, eta0, idx, order=1)
    eta = eta0.copy()
    done = np.zeros(N, bool)
    # a start that cannot be evaluated restarts at the typical values
    bad = ~np.isfinite(cur.value)
    if bad.any():
        eta[bad] = 0.0
        fix = evaluate(pm, design, ev, m, s, oi, eta[bad], idx[bad], order=1)
        cur = _merge(cur, fix, bad)
    it = 0
    while it < max_iter:
        it += 1
        T = cur.terms
        assert cur.J is not None and T.t_f is not None and T.h is not None
        G = cur.J[:, :, R]
        grad = np.einsum("bn,bnq->bq", T.t_f, G) + 2 * eta @ oi
        A = np.einsum("bnq,bn,bnr->bqr", G, T.h, G) + 2 * oi[None]
        step = -_solve(A, grad)
        step = np.clip(step, -3.0, 3.0)
        active = ~done & np.all(np.isfinite(step), axis=1)
        small = np.max(np.abs(step), axis=1) < tol
        done |= small & ~done
        active &= ~small
        if not active.any():
            break
        alpha = np.ones(N)
        todo = active.copy()
        for _ in range(12):
            sel = np.flatnonzero(todo)
            trial = eta[sel] + alpha[sel, None] * step[sel]
            new = evaluate(pm, design, ev, m, s, oi, trial, sel, order=1)
            ok = new.value <= cur.value[sel] + 1e-10 * (1.0 + np.abs(cur.value[sel]))
            if ok.any():
                acc = sel[ok]
                eta[acc] = trial[ok]
                mask = np.zeros(N, bool)
                mask[acc] = True
                cur = _merge(cur, _subset(new, ok), mask)
            todo[sel[ok]] = False
            if not todo.any():
                break
            alpha[todo] *= 0.5
            tiny = todo & (alpha * np.max(np.abs(step), axis=1) < tol)
            done |= tiny
            todo &= ~tiny
            if not todo.any():
                break
        stuck = todo  # no decrease along the scoring direction: the mode to working precision
        done |= stuck
    converged = done.copy()
    return Modes(cur, converged, it)


def _solve(A: Array, g: Array) -> Array:
    """Solve the stacked systems A x = g; a system that is singular or not finite gets x = nan."""
    good = np.all(np.isfinite(A), axis=(1, 2)) & np.all(np.isfinite(g), axis=1)
    out = np.full(g.shape, np.nan)
    if good.any():
        Ag = A[good] + 1e-12 * np.abs(A[good]).max(axis=(1, 2))[:, None, None] * np.eye(A.shape[1])[None]
        try:
            out[good] = np.linalg.solve(Ag, g[good][..., None])[..., 0]
        except np.linalg.LinAlgError:
            for j, i in enumerate(np.flatnonzero(good)):
                out[i] = np.linalg.lstsq(Ag[j], g[i], rcond=None)[0]
    return out


def _subset(p: Point, keep: NDArray[np.bool_]) -> Point:
    T = p.terms
    fields = {k: (v[keep] if v is not None else None) for k, v in T.__dict__.items()}
    return Point(p.eta[keep], p.psi[keep], p.f[keep], None if p.J is None else p.J[keep], Terms(**fields), p.value[keep])


def _merge(base: Point, new: Point, mask: NDArray[np.bool_]) -> Point:
    """``base`` with the rows ``mask`` replaced by ``new`` (in order)."""
    def put(a: Array | None, b: Array | None) -> Array | None:
        if a is None or b is None:
            return a
        out = a.copy()
        out[mask] = b
        return out

    T, U = base.terms, new.terms
    fields = {k: put(getattr(T, k), getattr(U, k)) for k in T.__dict__}
    return Point(put(base.eta, new.eta), put(base.psi, new.psi), put(base.f, new.f),  # type: ignore[arg-type]
                 put(base.J, new.J), Terms(**fields), put(base.value, new.value))  # type: ignore[arg-type]
