"""Predictions and exact Jacobians of many subjects: the one interface the estimators use.

``evaluator(theta, index, jacobian)`` takes a batch of parameter vectors (natural scale,
every template parameter) with the subject each belongs to, and returns the predictions
at that subject's observation times, padded to the design's ``n_max`` rows, and on request
``∂f/∂θ`` from the simulator's forward sensitivities. Draws of one subject simply repeat
its index.

:class:`SimulateEvaluator` answers with :func:`compartments.simulate.simulate`, one call
per batch row. A batched engine can replace it without changing the estimators.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import numpy as np
from numpy.typing import NDArray

from ..errors import SimulationError, UsageError
from ..model import Model
from ..simulate import simulate
from .design import Design

Array = NDArray[np.float64]


class Evaluator(Protocol):
    """Predictions (B, n_max) and, with ``jacobian``, ∂f/∂θ (B, n_max, P) of a batch."""

    def __call__(self, theta: Array, index: NDArray[np.int64], jacobian: bool = False
                 ) -> tuple[Array, Array | None]: ...


class SimulateEvaluator:
    """The evaluator built on :func:`compartments.simulate.simulate` (one call per row).

    A row whose simulation fails (non-finite values at extreme parameters) comes back as
    ``nan``; the likelihood then treats that draw or step as impossible.
    """

    def __init__(self, model: Model, design: Design) -> None:
        self.model = model
        self.design = design
        self._rows = [np.flatnonzero(design.mask[i]) for i in range(design.n_subjects)]
        self.calls = 0

    def __call__(self, theta: Array, index: NDArray[np.int64], jacobian: bool = False
                 ) -> tuple[Array, Array | None]:
        d = self.design
        B = theta.shape[0]
        n_max = d.mask.shape[1]
        P = self.model.n_params
        F = np.full((B, n_max), np.nan)
        J = np.full((B, n_max, P), np.nan) if jacobian else None
        for b in range(B):
            i = int(index[b])
            rows = self._rows[i]
            if rows.size == 0:
                continue
            self.calls += 1
            try:
                with np.errstate(all="ignore"):
                    r = simulate(self.model, theta[b], d.doses[i], d.times[i, rows], sensitivities=jacobian)
            except (SimulationError, UsageError, FloatingPointError):
                continue
            k = d.obs_index[i, rows]
            F[b, rows] = r.observables[np.arange(rows.size), k]
            if jacobian:
                assert r.observable_sensitivities is not None and J is not None
                J[b, rows] = r.observable_sensitivities[np.arange(rows.size), k]
        F[:, :][~d.mask[index]] = 0.0
        if J is not None:
            J[~d.mask[index]] = 0.0
        return F, J


def _batched(fn, theta: Array, shape: tuple[int, ...]) -> Array:
    """Call a compiled parameter function with a batch of parameter vectors: (*shape, B)."""
    out = fn(*[theta[:, j] for j in range(theta.shape[1])])
    out = np.asarray(out, dtype=float)
    if out.shape == shape + (theta.shape[0],):
        return out
    return np.broadcast_to(out.reshape(shape + (1,)) if out.size == int(np.prod(shape)) else out,
                           shape + (theta.shape[0],))


#: Batched matrix exponential: "torch" (``torch.linalg.matrix_exp``, float64) or "scipy"
#: (``scipy.linalg.expm``). benchmarks/population.py measures the two; torch was faster.
BACKENDS = ("torch", "scipy")


def _expm(M: Array, backend: str = "torch") -> Array:
    """Matrix exponentials of a stack (K, d, d)."""
    if M.shape[0] == 0:
        return M.copy()
    if backend == "torch":
        try:
            import torch
        except ImportError:  # torch missing: the SciPy path gives the same numbers, slower
            backend = "scipy"
        else:
            return torch.linalg.matrix_exp(torch.from_numpy(np.ascontiguousarray(M))).numpy()
    from scipy.linalg import expm

    return expm(M)


class LinearEvaluator:
    """Exact batched predictions of a model that is linear in its states.

    By superposition, the states at a sample time are the response to the initial state and
    constant inputs plus the response to each dose given before it (a sample taken at a dose
    time sees the state before that dose):

        x(t) = e^{At} x0 + ∫₀ᵗ e^{A(t−s)} b ds + Σ_bolus e^{A(t − t_e)} F·D e_k
               + Σ_infusion ∫_{t_s}^{min(t, t_end)} e^{A(t−s)} F·R e_k ds,

    each term an augmented matrix exponential (Van Loan 1978, IEEE TAC 23:395). With
    ``jacobian``, the forward sensitivities ride along in the same block matrix, and a lag
    time adds ``−A·jump`` (bolus) or ``∓F·R e_k`` (infusion start and end) to its column,
    as in :func:`compartments.simulate.simulate`. Every (subject, sample, dose) pair of a
    batch goes into one stacked matrix exponential. Sensitivities are computed only for the
    parameters in ``columns`` (the others come back as 0).
    """

    def __init__(self, model: Model, design: Design, columns: tuple[int, ...] | None = None,
                 backend: str = "torch") -> None:
        if backend not in BACKENDS:
            raise UsageError(f"backend must be one of {', '.join(BACKENDS)}, got {backend!r}")
        self.backend = backend
        if not model.is_linear:
            raise UsageError(f"template {model.template.name!r} is not linear in its states")
        self.model = model
        self.design = design
        self.columns = tuple(range(model.n_params)) if columns is None else tuple(columns)
        self.calls = 0
        routes = {r: i for i, r in enumerate(model.routes)}
        self._route_names = tuple(model.routes)
        from ..dosing import resolve_route

        sub, smp, t_s, kind, route, amount, rate, dur = [], [], [], [], [], [], [], []
        starts, counts = [], []
        for i in range(design.n_subjects):
            rows = np.flatnonzero(design.mask[i])
            start = len(sub)
            for d in design.doses[i]:
                r = resolve_route(d.route, tuple(model.routes), model.template.name)
                inf = d.route == "infusion"
                for j in rows:
                    sub.append(i)
                    smp.append(j)
                    t_s.append(d.time)
                    kind.append(1 if inf else 0)
                    route.append(routes[r])
                    amount.append(d.amount)
                    rate.append(d.infusion_rate)
                    dur.append(d.infusion_duration)
            starts.append(start)
            counts.append(len(sub) - start)
        self._pair = {
            "sample": np.array(smp, dtype=np.int64), "time": np.array(t_s, dtype=float),
            "kind": np.array(kind, dtype=np.int64), "route": np.array(route, dtype=np.int64),
            "amount": np.array(amount, dtype=float), "rate": np.array(rate, dtype=float),
            "duration": np.array(dur, dtype=float),
        }
        self._starts = np.array(starts, dtype=np.int64)
        self._counts = np.array(counts, dtype=np.int64)

    def _pairs(self, index: NDArray[np.int64]) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        """(batch row, pair index) of every pair of the batch's subjects."""
        cnt = self._counts[index]
        b = np.repeat(np.arange(index.size), cnt)
        offs = np.repeat(self._starts[index] - np.r_[0, np.cumsum(cnt)[:-1]], cnt)
        return b, offs + np.arange(int(cnt.sum()))

    def __call__(self, theta: Array, index: NDArray[np.int64], jacobian: bool = False
                 ) -> tuple[Array, Array | None]:
        self.calls += theta.shape[0]
        m, d = self.model, self.design
        B = theta.shape[0]
        n, P = m.n_states, m.n_params
        cols = self.columns if jacobian else ()
        c = len(cols)
        N = n * (c + 1)
        n_max = d.mask.shape[1]
        with np.errstate(all="ignore"):
            A = np.moveaxis(_batched(m._A, theta, (n, n)), -1, 0)  # (B, n, n)
            bvec = np.moveaxis(_batched(m._b, theta, (n, 1)), -1, 0)[..., 0]  # (B, n)
            x0 = np.moveaxis(_batched(m._x0, theta, (n, 1)), -1, 0)[..., 0]
            big = np.zeros((B, N + 1, N + 1))
            big[:, :n, :n] = A
            big[:, :n, N] = bvec
            w0 = np.zeros((B, N + 1))
            w0[:, :n] = x0
            w0[:, N] = 1.0
            if c:
                Ap = np.moveaxis(_batched(m._Ap, theta, (P * n, n)).reshape(P, n, n, B), -1, 0)
                bp = np.moveaxis(_batched(m._bp, theta, (n, P)), -1, 0)
                x0p = np.moveaxis(_batched(m._x0p, theta, (n, P)), -1, 0)
                for a, j in enumerate(cols):
                    blk = slice(n * (a + 1), n * (a + 2))
                    big[:, blk, blk] = A
                    big[:, blk, :n] = Ap[:, j]
                    big[:, blk, N] = bp[:, :, j]
                    w0[:, blk] = x0p[:, :, j]
            X = np.zeros((B, n_max, N))
            self._eig = _decompose(A)
            if np.any(big[:, :, N]) or np.any(w0[:, :N]):
                t = np.where(d.mask[index], d.times[index], 0.0)  # (B, n_max)
                E = _expm((big[:, None] * t[:, :, None, None]).reshape(-1, N + 1, N + 1), self.backend)
                X += (E @ np.repeat(w0, n_max, axis=0)[..., None])[..., :N, 0].reshape(B, n_max, N)
            self._doses(theta, index, big, X, cols)
        return self._observe(theta, index, X, cols, jacobian)

    def _route_inputs(self, theta: Array, cols: tuple[int, ...]) -> tuple[Array, Array, Array, Array]:
        """Per route and batch row: F (R, B), dF (R, B, c), lag (R, B), state (R,)."""
        m = self.model
        B = theta.shape[0]
        R = len(self._route_names)
        F = np.ones((R, B))
        dF = np.zeros((R, B, len(cols)))
        lag = np.zeros((R, B))
        state = np.zeros(R, dtype=np.int64)
        for r, name in enumerate(self._route_names):
            e = m.routes[name]
            F[r] = _batched(e.bioavailability, theta, (1, 1)).reshape(B)
            g = _batched(e.bioavailability_grad, theta, (1, m.n_params)).reshape(m.n_params, B)
            dF[r] = g[list(cols)].T if cols else np.zeros((B, 0))
            if e.lag_index is not None:
                lag[r] = theta[:, e.lag_index]
            state[r] = e.state_index
        return F, dF, lag, state

    def _doses(self, theta: Array, index: NDArray[np.int64], big: Array, X: Array, cols: tuple[int, ...]) -> None:
        """Add every dose's response to X (B, n_max, N) in place."""
        m, d = self.model, self.design
        n = m.n_states
        N = X.shape[2]
        b, k = self._pairs(index)
        if b.size == 0:
            return
        pr = self._pair
        F, dF, lag, state = self._route_inputs(theta, cols)
        route = pr["route"][k]
        st = state[route]
        Fk, dFk, Lk = F[route, b], dF[route, b], lag[route, b]
        smp = pr["sample"][k]
        tk = d.times[index[b], smp]
        start = pr["time"][k] + Lk
        lag_col = [a for a, j in enumerate(cols) if any(m.routes[r].lag_index == j for r in self._route_names)]
        lag_of = {a: [ri for ri, r in enumerate(self._route_names) if m.routes[r].lag_index == cols[a]]
                  for a in lag_col}
        A = big[:, :n, :n]
        # pulses: (pair, time of the pulse, vector added at that time)
        bol = (pr["kind"][k] == 0) & (tk > start)
        if bol.any():
            amt = pr["amount"][k][bol]
            vec = np.zeros((int(bol.sum()), N))
            rows = np.arange(vec.shape[0])
            vec[rows, st[bol]] = amt * Fk[bol]
            for a in range(len(cols)):
                vec[rows, n * (a + 1) + st[bol]] += amt * dFk[bol, a]
            for a, rr in lag_of.items():
                on = np.isin(route[bol], rr)
                jump = np.zeros((int(bol.sum()), n))
                jump[rows, st[bol]] = amt * Fk[bol]
                vec[:, n * (a + 1):n * (a + 2)] -= np.where(on[:, None], np.einsum("bij,bj->bi", A[b[bol]], jump), 0.0)
            self._propagate(big, X, b[bol], smp[bol], tk[bol] - start[bol], vec)
        inf = (pr["kind"][k] == 1) & (tk > start)
        if inf.any():
            self._infusions(big, X, b[inf], smp[inf], tk[inf], start[inf], pr["duration"][k][inf],
                            pr["rate"][k][inf], st[inf], Fk[inf], dFk[inf], route[inf], lag_of)

    def _infusions(self, big: Array, X: Array, b: NDArray[np.int64], smp: NDArray[np.int64], tk: Array,
                   start: Array, dur: Array, rate: Array, st: NDArray[np.int64], Fk: Array, dFk: Array,
                   route: NDArray[np.int64], lag_of: dict[int, list[int]]) -> None:
        n = self.model.n_states
        N = X.shape[2]
        K = b.size
        rows = np.arange(K)
        inp = np.zeros((K, N))
        inp[rows, st] = rate * Fk
        for a in range(dFk.shape[1]):
            inp[rows, n * (a + 1) + st] += rate * dFk[:, a]
        end = start + dur
        mid = np.minimum(tk, end)
        Q = np.zeros((K, N + 1, N + 1))
        Q[:, :N, :N] = big[b, :N, :N]
        Q[:, :N, N] = inp
        integral = _expm(Q * (mid - start)[:, None, None], self.backend)[:, :N, N]
        self._propagate(big, X, b, smp, tk - mid, integral)
        for a, rr in lag_of.items():
            on = np.isin(route, rr)
            if not on.any():
                continue
            v = np.zeros((K, N))
            v[rows, n * (a + 1) + st] = -rate * Fk
            self._propagate(big, X, b[on], smp[on], (tk - start)[on], v[on])
            after = on & (tk > end)
            if after.any():
                self._propagate(big, X, b[after], smp[after], (tk - end)[after], -v[after])

    def _propagate(self, big: Array, X: Array, b: NDArray[np.int64], smp: NDArray[np.int64], tau: Array,
                   vec: Array) -> None:
        """X[b, smp] += e^{𝒜 τ} vec (homogeneous part of the block matrix)."""
        N = X.shape[2]
        n = self.model.n_states
        out, done = _eigen_response(big, self._eig, b, n, tau, vec)
        rest = ~done
        if rest.any():
            E = _expm(big[b[rest], :N, :N] * tau[rest, None, None], self.backend)
            out[rest] = np.einsum("kij,kj->ki", E, vec[rest])
        np.add.at(X, (b, smp), out)

    def _observe(self, theta: Array, index: NDArray[np.int64], X: Array, cols: tuple[int, ...], jacobian: bool
                 ) -> tuple[Array, Array | None]:
        m, d = self.model, self.design
        n, P = m.n_states, m.n_params
        B, n_max, _ = X.shape
        x = [X[..., i] for i in range(n)]
        th = [theta[:, j][:, None] for j in range(P)]
        k = d.obs_index[index]
        with np.errstate(all="ignore"):
            g = np.broadcast_to(np.asarray(m._g(*x, *th), dtype=float), (len(m.observable_names), 1, B, n_max))
            F = np.take_along_axis(g[:, 0], k[None], axis=0)[0]
            J = None
            if jacobian:
                gx = np.broadcast_to(np.asarray(m._gx(*x, *th), dtype=float), (len(m.observable_names), n, B, n_max))
                gp = np.broadcast_to(np.asarray(m._gp(*x, *th), dtype=float), (len(m.observable_names), P, B, n_max))
                gxk = np.take_along_axis(gx, k[None, None], axis=0)[0]  # (n, B, n_max)
                gpk = np.take_along_axis(gp, k[None, None], axis=0)[0]  # (P, B, n_max)
                J = np.zeros((B, n_max, P))
                for a, j in enumerate(cols):
                    S = X[..., n * (a + 1):n * (a + 2)]  # (B, n_max, n)
                    J[..., j] = np.einsum("ibt,bti->bt", gxk, S) + gpk[j]
        mask = d.mask[index]
        F = np.where(mask, F, 0.0)
        if J is not None:
            J = np.where(mask[..., None], J, 0.0)
        return F, J


#: Eigenvalues closer than this (relative) or an eigenvector matrix worse conditioned than
#: ``EIGEN_COND`` send a pair to the matrix exponential instead.
EIGEN_GAP = 1e-5
EIGEN_COND = 1e8


@dataclass(frozen=True)
class _Eigen:
    """Eigendecomposition of each batch row's A (``good`` False where it is not usable)."""

    lam: Array
    V: Array
    Vi: Array
    good: NDArray[np.bool_]


def _decompose(A: Array) -> _Eigen:
    """``A = V Λ V⁻¹`` per batch row; rows with close eigenvalues (relative gap below
    ``EIGEN_GAP``) or an ill-conditioned V (condition above ``EIGEN_COND``) are marked."""
    B, n, _ = A.shape
    with np.errstate(all="ignore"):
        lam, V = np.linalg.eig(A)
        scale = np.maximum(np.max(np.abs(lam), axis=1), 1e-300)
        gap = np.full(B, np.inf)
        for i in range(n):
            for j in range(i + 1, n):
                gap = np.minimum(gap, np.abs(lam[:, i] - lam[:, j]) / scale)
        good = np.isfinite(lam).all(axis=1) & (gap > EIGEN_GAP)
        Vi = np.zeros_like(V)
        if good.any():
            Vi[good] = np.linalg.inv(V[good])
        cond = np.linalg.norm(V, axis=(1, 2)) * np.linalg.norm(Vi, axis=(1, 2))
        good &= np.isfinite(cond) & (cond < EIGEN_COND)
    return _Eigen(lam, V, Vi, good)


def _eigen_response(big: Array, eig: _Eigen, b: NDArray[np.int64], n: int, tau: Array, vec: Array
                    ) -> tuple[Array, NDArray[np.bool_]]:
    """``e^{𝒜τ} vec`` for the block matrix 𝒜 = [[A, 0], [D_j, A]] of states and sensitivities, by
    the eigendecomposition ``A = V Λ V⁻¹`` of each pair's batch row ``b``: the state part is
    ``V e^{Λτ} V⁻¹ x`` and each sensitivity block ``e^{Aτ} S_j + L(Aτ, D_j τ) x`` with the
    Fréchet derivative ``L = V [(V⁻¹ D_j V) ∘ Φ] V⁻¹``, ``Φ_il = (e^{λ_i τ} − e^{λ_l τ})/(λ_i − λ_l)``
    and ``Φ_ii = τ e^{λ_i τ}`` (Daleckii–Krein; Higham 2008, Functions of Matrices, §3.2).
    Pairs whose row is not usable are left (``done`` False) for the matrix exponential."""
    K, N = vec.shape
    c = N // n - 1
    out = np.zeros((K, N))
    good = eig.good[b]
    if not good.any():
        return out, good
    bg = b[good]
    V, Vi, lam, t = eig.V[bg], eig.Vi[bg], eig.lam[bg], tau[good]
    v = vec[good]
    el = np.exp(lam * t[:, None])  # (k, n)
    y = np.einsum("kij,kj->ki", Vi, v[:, :n])
    res = np.zeros((V.shape[0], N), dtype=complex)
    res[:, :n] = np.einsum("kij,kj->ki", V, el * y)
    if c:
        dl = lam[:, :, None] - lam[:, None, :]
        with np.errstate(all="ignore"):
            phi = (el[:, :, None] - el[:, None, :]) / dl
        idx = np.arange(n)
        phi[:, idx, idx] = t[:, None] * el
        Bg = big[bg]
        for a in range(c):
            blk = slice(n * (a + 1), n * (a + 2))
            D = Bg[:, blk, :n]
            G = np.einsum("kij,kjl,klm->kim", Vi, D, V) * phi
            ys = np.einsum("kij,kj->ki", Vi, v[:, blk])
            res[:, blk] = np.einsum("kij,kj->ki", V, el * ys + np.einsum("kil,kl->ki", G, y))
    out[good] = res.real
    return out, good


def make_evaluator(model: Model, design: Design, columns: tuple[int, ...]) -> Evaluator:
    """The batched exact evaluator for a linear model, the simulator otherwise."""
    if model.is_linear:
        return LinearEvaluator(model, design, columns)
    return SimulateEvaluator(model, design)
