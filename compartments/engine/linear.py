"""Linear models by the eigen-decomposition of ``A(θ)``: all samples and doses at once.

For ``x' = A x + b + u(t)`` with ``A = V Λ V⁻¹`` (``W = V⁻¹``) the state is a sum over the
terms acting on a sample (superposition):

* an impulse ``v`` at ``s`` (a bolus, or the state a segment starts from):
  ``e^{A(t − s)} v = V [e^{λ(t − s)} ⊙ W v]``;
* a step of rate ``r`` from ``s`` (the input ``b``, an infusion's start; its end is a
  negative step): ``A⁻¹(e^{A(t − s)} − I) r = V [ψ(λ, t − s) ⊙ W r]``,
  ``ψ(λ, τ) = (e^{λτ} − 1)/λ`` (``expm1``; ``τ`` at ``λ = 0``).

**Sensitivities.** For any function ``f`` of the matrix, ``∂f(A)/∂θⱼ = V (Gⱼ ⊙ F¹) W`` with
``Gⱼ = W (∂A/∂θⱼ) V`` and ``F¹`` the first divided differences of ``f`` at the eigenvalues
(Daleckii–Krein; e.g. Higham, *Functions of Matrices*, SIAM 2008, thm. 3.11): off the
diagonal ``(f(λₖ) − f(λₗ))/(λₖ − λₗ)``, on it ``f′(λₖ)``. Summed over the terms of a sample,
``Σₑ F¹ₖₗ(τₑ) cₑₗ = (Qₖₗ − zₗ)/(λₖ − λₗ)`` with ``Qₖₗ = Σₑ f(λₖ, τₑ) cₑₗ`` and ``z`` the
state in eigen-coordinates, so one ``(P, n, n)`` product per pair is all it takes. The
parameter dependence of the term vectors (bioavailability, initial state, the steady
state) and of the event times (lag: ``∂/∂s = −∂/∂τ``) add their own terms.

**Steady state.** The regimen's doses ``k ≥ K`` before a steady-state record (see
:mod:`.schedule`) sum to ``V [f(λ) ⊙ W r]`` at ``t₀`` with
``f(λ) = e^{λu} h(λ)/(1 − e^{λτ})`` (the geometric series of ``e^{Aτ}``), ``u`` the time from
the last tail dose's entry (end, for an infusion) to ``t₀``, ``h = 1`` for a bolus and
``ψ(λ, d)`` for an infusion of duration ``d``; a constant input adds ``−A⁻¹ b``.

**Where this path does not apply** (the caller falls back to :mod:`.expm` per subject):
complex eigenvalues, and eigenvalues closer than :data:`GAP` relative to each other
(``V`` becomes ill-conditioned and the divided differences lose digits; the threshold is
measured in ``benchmarks/README.md``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..errors import SimulationError, UsageError
from ..model import Model
from .kernels import LinearKernel
from .layout import BOLUS, INPUT, OFF, ON, START, Layout

Array = NDArray[np.float64]

#: Smallest relative distance |λₖ − λₗ| / max(|λₖ|, |λₗ|) between two eigenvalues for the
#: eigen path; closer pairs go to the matrix-exponential path (see benchmarks/README.md).
GAP = 1e-3


@dataclass
class Parts:
    """Parameter-dependent pieces of every subject (N subjects, q free parameters)."""

    lam: Array  # (N, n) eigenvalues
    V: Array  # (N, n, n)
    W: Array  # (N, n, n)
    G: Array | None  # (N, q, n, n) W ∂A/∂θ V for the free parameters
    b: Array  # (N, n)
    bp: Array  # (N, n, q)
    x0: Array  # (N, n)
    x0p: Array  # (N, n, q)
    F: Array  # (R, N) bioavailability per route
    dF: Array  # (R, N, q)
    bad: NDArray[np.bool_]  # (N,) subjects this path does not cover


def parts(kernel: LinearKernel, theta: Array, free: NDArray[np.int64] | None, sens: bool = True) -> Parts:
    """Unpack the fused kernel and decompose ``A`` for every subject."""
    n, p = kernel.n, kernel.p
    N = theta.shape[0]
    K = kernel.parts(theta).T  # (N, K)
    o = 0

    def take(size: int, shape: tuple[int, ...]) -> Array:
        nonlocal o
        out = K[:, o:o + size].reshape((N,) + shape)
        o += size
        return out

    A = take(n * n, (n, n))
    Ap = take(p * n * n, (p, n, n))
    b = take(n, (n,))
    bp = take(n * p, (n, p))
    x0 = take(n, (n,))
    x0p = take(n * p, (n, p))
    F = np.empty((len(kernel.routes), N))
    dF = np.empty((len(kernel.routes), N, p))
    for r in range(len(kernel.routes)):
        F[r] = take(1, ())
        dF[r] = take(p, (p,))
    lam, V = np.linalg.eig(A)
    bad = ~np.all(np.isfinite(A), axis=(1, 2))
    if np.iscomplexobj(lam):
        bad |= np.any(lam.imag != 0, axis=1)
        lam, V = lam.real.copy(), V.real.copy()
    if n > 1:
        d = np.abs(lam[:, :, None] - lam[:, None, :])
        scale = np.maximum(np.abs(lam[:, :, None]), np.abs(lam[:, None, :]))
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = np.where(scale > 0, d / scale, 0.0)
        rel[:, np.arange(n), np.arange(n)] = np.inf
        bad |= rel.min(axis=(1, 2)) < GAP
    if bad.any():  # placeholders so that the rest stays finite; these subjects are redone
        V[bad] = np.eye(n)
        lam[bad] = -np.arange(1.0, n + 1.0)
    W = np.linalg.inv(V)
    q = np.arange(p) if free is None else free
    G = mat_mat(mat_mat(W[:, None], Ap[:, q]), V[:, None]) if sens else None
    return Parts(lam, V, W, G, b, bp[:, :, q], x0, x0p[:, :, q], F, dF[:, :, q], bad)


def psi(lam: Array, tau: Array) -> Array:
    """``(e^{λτ} − 1)/λ``, and ``τ`` where ``λ = 0``."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(lam == 0, tau, np.expm1(lam * tau) / np.where(lam == 0, 1.0, lam))


#: Taylor coefficients (m + 1)/(m + 2)! of ψ′(λ, τ)/τ² in powers of λτ (m = 0 … 8).
_SERIES = np.array([(m + 1) / np.prod(np.arange(1.0, m + 3.0)) for m in range(9)])


def psi_prime(lam: Array, tau: Array) -> Array:
    """``∂ψ/∂λ = (τ e^{λτ} − ψ)/λ``; a series where ``|λτ| < 0.05`` (τ² Σ (m+1)(λτ)^m/(m+2)!)."""
    z = lam * tau
    small = np.abs(z) < 0.05
    series = np.full(z.shape, _SERIES[-1])
    for a in _SERIES[-2::-1]:  # Horner
        series *= z
        series += a
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        direct = (tau * np.exp(z) - psi(lam, tau)) / np.where(small, 1.0, lam)
    return np.where(small, tau * tau * series, direct)


def _divided(fk: Array, lam: Array) -> Array:
    """Off-diagonal first divided differences ``(f(λₖ) − f(λₗ))/(λₖ − λₗ)`` (…, n, n); 0 on the diagonal."""
    n = lam.shape[-1]
    den = lam[..., :, None] - lam[..., None, :]
    den[..., np.arange(n), np.arange(n)] = 1.0
    out = (fk[..., :, None] - fk[..., None, :]) / den
    out[..., np.arange(n), np.arange(n)] = 0.0
    return out


def steady_start(model: Model, layout: Layout, pt: Parts, theta: Array, free: NDArray[np.int64], sens: bool
                 ) -> tuple[Array, Array]:
    """Eigen-coordinates (G_ss, n) of the state each steady-state segment starts from, and their
    sensitivities (G_ss, n, q)."""
    g = np.flatnonzero(layout.seg_steady)
    s = layout.seg_subject[g]
    n, q = pt.lam.shape[1], free.size
    lam = pt.lam[s]
    if np.any(lam >= 0) and not np.all(pt.bad[s]):
        raise SimulationError(
            f"template {model.template.name!r} has an amount that never settles under a repeated regimen at these "
            "parameters (no elimination from it), so a steady-state dose has no steady state to start from")
    route = layout.seg_route[g]
    routes = list(model.routes)
    state = np.array([model.routes[routes[r]].state_index for r in route], dtype=np.int64)
    lag_idx = np.array([-1 if model.routes[routes[r]].lag_index is None else model.routes[routes[r]].lag_index
                        for r in route], dtype=np.int64)
    ell = np.where(lag_idx >= 0, theta[s, np.maximum(lag_idx, 0)], 0.0)
    d, tau, K = layout.seg_duration[g], layout.seg_interval[g], layout.seg_tail[g]
    u = K * tau - ell - d
    if np.any(u <= 0) or np.any(u < 0):
        raise UsageError("a lag time is longer than the schedule was prepared for; prepare the design with "
                         "max_lag covering it")
    infusion = d > 0
    size = np.where(infusion, layout.seg_rate[g], layout.seg_amount[g])
    F = pt.F[route, s]
    w = pt.W[s, :, state] * (size * F)[:, None]  # (G, n) eigen-coordinates of the dose (or rate) vector
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        geo = 1.0 / -np.expm1(lam * tau[:, None])
        h = np.where(infusion[:, None], psi(lam, d[:, None]), 1.0)
        f = np.exp(lam * u[:, None]) * h * geo
        c = f * w
        if not sens:
            dc = np.zeros((g.size, n, q))
        else:
            dlog = (u[:, None] + np.where(infusion[:, None], psi_prime(lam, d[:, None]) / h, 0.0)
                    + tau[:, None] * np.exp(lam * tau[:, None]) * geo)
            F1 = _divided(f, lam)
            F1[:, np.arange(n), np.arange(n)] = f * dlog
            dc = np.einsum("gjkl,gkl,gl->gkj", pt.G[s], F1, w)
            dvec = pt.W[s, :, state][:, :, None] * (size[:, None] * pt.dF[route, s])[:, None, :]
            dc += f[:, :, None] * dvec
            lag_pos = {int(j): i for i, j in enumerate(free)}
            for i, j in enumerate(lag_idx):
                if j >= 0 and int(j) in lag_pos:
                    dc[i, :, lag_pos[int(j)]] -= lam[i] * c[i]  # ∂u/∂ℓ = −1
        if np.any(pt.b[s] != 0):
            wb = np.einsum("gkl,gl->gk", pt.W[s], pt.b[s])
            c = c - wb / lam
            if sens:
                Fb = 1.0 / (lam[:, :, None] * lam[:, None, :])
                Fb[:, np.arange(n), np.arange(n)] = 1.0 / lam**2
                dc += np.einsum("gjkl,gkl,gl->gkj", pt.G[s], Fb, wb)
                dc -= np.einsum("gkl,glj->gkj", pt.W[s], pt.bp[s]) / lam[:, :, None]
    return c, dc


def _term_vectors(layout: Layout, pt: Parts, c_ss: Array, dc_ss: Array, with_dc: bool = True
                  ) -> tuple[Array, Array | None]:
    """Eigen-coordinates of every term's vector (G, E, n) and their parameter derivatives (G, E, n, q)."""
    kind, subj = layout.kind, layout.seg_subject
    G, E = kind.shape
    n, q = pt.lam.shape[1], pt.bp.shape[2]
    c = np.zeros((G, E, n))
    dc = np.zeros((G, E, n, q)) if with_dc else None
    dose = (kind == BOLUS) | (kind == ON) | (kind == OFF)
    if dose.any():
        g, e = np.nonzero(dose)
        sd, r = subj[g], layout.route[g, e]
        col = pt.W[sd, :, layout.state[g, e]]
        c[g, e] = col * (layout.size[g, e] * pt.F[r, sd])[:, None]
        if dc is not None:
            dc[g, e] = col[:, :, None] * (layout.size[g, e][:, None] * pt.dF[r, sd])[:, None, :]
    Wg = pt.W[subj]  # START is every segment's first term (as laid out)
    c[:, 0] = mat_vec(Wg, pt.x0[subj])
    steady = np.flatnonzero(layout.seg_steady)
    c[steady, 0] = c_ss
    if dc is not None:
        dc[:, 0] = mat_mat(Wg, pt.x0p[subj])
        dc[steady, 0] = dc_ss
    if (kind == INPUT).any():
        g, e = np.nonzero(kind == INPUT)
        c[g, e] = mat_vec(pt.W[subj[g]], pt.b[subj[g]])
        if dc is not None:
            dc[g, e] = mat_mat(pt.W[subj[g]], pt.bp[subj[g]])
    return c, (dc if dc is not None and np.any(dc) else None)


def _sorted_terms(layout: Layout, theta: Array) -> tuple[Array, NDArray[np.int64]]:
    """Times after lags (G, E), sorted within each segment (``START`` first at equal times;
    padding after the real terms, at the last real time), and the sorting order."""
    subj = layout.seg_subject
    shift = np.where(layout.lag >= 0, theta[subj[:, None], np.maximum(layout.lag, 0)], 0.0)
    s = np.where(layout.real, layout.time + shift, np.inf)
    order = np.lexsort((layout.kind != START, s), axis=-1)
    s = s[layout.rows, order]
    last = s[np.arange(s.shape[0]), layout.count - 1]
    s = np.where(layout.real, s, last[:, None])
    return s, order


def _scan(layout: Layout, lam: Array, s: Array, order: NDArray[np.int64], c: Array, dc: Array | None,
          lag_free: list[tuple[int, int]], sens: bool) -> dict[str, Array]:
    """Running sums over each segment's sorted terms, one slot per term (all segments at once).

    Each sum is carried from one term's time to the next by ``e^{λΔ}`` (impulse sums) and
    ``ψ(λ, Δ)`` (the rates in effect), then the term is added: ``Z`` the state, ``R`` the
    rates, ``Q`` (``Qₖₗ``), ``D`` (diagonal divided differences), ``dZ``/``dR`` (term vectors'
    own derivatives), ``L`` (∂/∂τ of the terms shifted by each free lag parameter).
    """
    kind = layout.kind[layout.rows, order]
    lagp = layout.lag[layout.rows, order]
    c = c[layout.rows, order]
    impulse = ((kind == START) | (kind == BOLUS))[:, :, None]
    cZ, cR = c * impulse, c * ~impulse
    G, E, n = c.shape
    delta = np.diff(s, axis=1, prepend=s[:, :1])[:, :, None]
    lamg = lam[:, None, :]
    steps = bool(np.any(cR))
    with np.errstate(over="ignore", invalid="ignore"):
        ex = np.exp(lamg * delta)
        ps = psi(lamg, delta) if steps else np.zeros_like(ex)
    out = {"Z": cZ.copy(), "R": np.cumsum(cR, axis=1)}
    Z, R = out["Z"], out["R"]
    if sens:
        pp = psi_prime(lamg, delta) if steps else np.zeros_like(ex)
        out["Q"] = np.zeros((G, E, n, n))
        out["Q"][:, 0] = cZ[:, 0, None, :]
        out["D"] = np.zeros((G, E, n))
        if dc is not None:
            dc = dc[layout.rows, order]
            out["dZ"], out["dR"] = dc * impulse[..., None], np.cumsum(dc * ~impulse[..., None], axis=1)
        for k, (j, _) in enumerate(lag_free):
            hit = (lagp == j)[:, :, None]
            with np.errstate(over="ignore", invalid="ignore"):  # extreme rates: caught as non-finite
                out[f"L{k}"] = np.where(hit, np.where(impulse, lamg * c, c), 0.0)
    diag = np.arange(n)
    for j in range(1, E):
        a = int(layout.active[j])
        e, pj = ex[:a, j], ps[:a, j]
        if not sens:
            Z[:a, j] += e * Z[:a, j - 1]
            if steps:
                Z[:a, j] += pj * R[:a, j - 1]
            continue
        Q = out["Q"]
        prev = Q[:a, j - 1]
        zp = prev[:, diag, diag]  # the state: Qₗₗ = zₗ
        new = e[:, :, None] * prev
        new += cZ[:a, j, None, :]
        D = e * (out["D"][:a, j - 1] + delta[:a, j] * zp)
        if steps:
            new += pj[:, :, None] * R[:a, j - 1, None, :]
            D += pp[:a, j] * R[:a, j - 1]
        Q[:a, j] = new
        out["D"][:a, j] = D
        if dc is not None:
            out["dZ"][:a, j] += e[:, :, None] * out["dZ"][:a, j - 1] + pj[:, :, None] * out["dR"][:a, j - 1]
        for k in range(len(lag_free)):
            L = out[f"L{k}"]
            L[:a, j] += e * L[:a, j - 1]
    if sens:
        out["Z"] = out["Q"][:, :, diag, diag]
    return out


def _at_samples(layout: Layout, lam: Array, s: Array, order: NDArray[np.int64], sums: dict[str, Array],
                sens: bool) -> dict[str, Array]:
    """The running sums carried from each sample's last term to the sample's time."""
    g = layout.sample_segment
    t = layout.t
    kind = layout.kind[g[:, None], order[g]]
    before = (s[g] < t[:, None]) | ((s[g] == t[:, None]) & (kind == START))
    m = np.minimum(before.sum(axis=1), layout.count[g]) - 1
    delta = (t - s[g, m])[:, None]
    lt = lam[g]
    Z, R = sums["Z"][g, m], sums["R"][g, m]
    steps = bool(np.any(R))
    with np.errstate(over="ignore", invalid="ignore"):
        ex = np.exp(lt * delta)
        ps = psi(lt, delta) if steps else np.zeros_like(ex)
    out = {"z": ex * Z + ps * R}
    if not sens:
        return out
    out["Q"] = ex[:, :, None] * sums["Q"][g, m] + ps[:, :, None] * R[:, None, :]
    out["D"] = ex * (sums["D"][g, m] + delta * Z) + (psi_prime(lt, delta) * R if steps else 0.0)
    if "dZ" in sums:
        out["dz"] = ex[:, :, None] * sums["dZ"][g, m] + ps[:, :, None] * sums["dR"][g, m]
    for key in sums:
        if key.startswith("L"):
            out[key] = ex * sums[key][g, m]
    return out


@dataclass
class Sensitivities:
    """What the sensitivities of every sample are made of, in eigen-coordinates: ``∂x/∂θⱼ =
    V [Σₗ Gⱼ[k, l] H[k, l] + extra[k, j]]``. :meth:`states` forms them all (T, n, q);
    :meth:`project` only ``u · ∂x/∂θ`` for one row ``u`` per sample (an observable's
    gradient), which is what a Jacobian needs and costs a fraction of it."""

    V: Array  # (T, n, n)
    H: Array  # (T, n, n)
    G: Array  # (N, q, n, n)
    extra: Array | None  # (T, n, q)
    subject: NDArray[np.int64]  # (T,)
    position: NDArray[np.int64]  # (T,) row of each sample within its subject

    def states(self) -> Array:
        Gt = self.G[self.subject]  # (T, q, n, n)
        n = self.H.shape[1]
        dz = Gt[:, :, :, 0] * self.H[:, None, :, 0]
        for i in range(1, n):
            dz += Gt[:, :, :, i] * self.H[:, None, :, i]
        dz = dz.transpose(0, 2, 1)
        if self.extra is not None:
            dz = dz + self.extra
        return mat_mat(self.V, dz)

    def project(self, u: Array) -> Array:
        """``u · ∂x/∂θ`` (T, q) for rows ``u`` (T, n) in natural coordinates."""
        w = (u[:, :, None] * self.V).sum(axis=1)  # u V: (T, n)
        T, n = w.shape
        N, q = self.G.shape[0], self.G.shape[1]
        M = (w[:, :, None] * self.H).reshape(T, n * n)
        pad = np.zeros((N, int(self.position.max(initial=0)) + 1, n * n))
        pad[self.subject, self.position] = M
        Gf = self.G.reshape(N, q, n * n).transpose(0, 2, 1)
        out = (pad @ Gf)[self.subject, self.position]  # (T, q)
        if self.extra is not None:
            out += (w[:, :, None] * self.extra).sum(axis=1)
        return out


def solve(model: Model, kernel: LinearKernel, layout: Layout, theta: Array, sens: bool,
          free: NDArray[np.int64] | None = None
          ) -> tuple[Array, Sensitivities | None, NDArray[np.bool_]]:
    """States (T, n), their sensitivities to the free parameters (see :class:`Sensitivities`)
    and the subjects this path does not cover (N,), for parameter rows ``theta`` (N, p).

    Extreme parameters may overflow: the caller checks the results are finite and says so."""
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        return _solve(model, kernel, layout, theta, sens, free)


def _solve(model: Model, kernel: LinearKernel, layout: Layout, theta: Array, sens: bool,
           free: NDArray[np.int64] | None) -> tuple[Array, Sensitivities | None, NDArray[np.bool_]]:
    fr = np.arange(kernel.p) if free is None else np.asarray(free, dtype=np.int64)
    pt = parts(kernel, theta, fr, sens)
    n, q = kernel.n, fr.size
    if layout.seg_steady.any():
        c_ss, dc_ss = steady_start(model, layout, pt, theta, fr, sens)
    else:
        c_ss, dc_ss = np.zeros((0, n)), np.zeros((0, n, q))
    c, dc = _term_vectors(layout, pt, c_ss, dc_ss, sens and not (kernel.dF_zero and kernel.x0_zero
                                                                 and not kernel.has_input and not c_ss.size))
    lam = pt.lam[layout.seg_subject]
    s, order = _sorted_terms(layout, theta)
    lag_params = set(layout.lag_params)
    lag_free = [(int(j), i) for i, j in enumerate(fr) if int(j) in lag_params]
    sums = _scan(layout, lam, s, order, c, dc, lag_free, sens)
    at = _at_samples(layout, lam, s, order, sums, sens)
    st = layout.sample_subject
    V = pt.V[st]
    X = mat_vec(V, at["z"])
    if not sens:
        return X, None, pt.bad
    H = _difference_quotients(at["Q"], at["z"], pt.lam[st])
    H[:, np.arange(n), np.arange(n)] = at["D"]
    extra = at.get("dz")
    for k, (_, i) in enumerate(lag_free):
        if extra is None:
            extra = np.zeros((st.size, n, q))
        extra[:, :, i] -= at[f"L{k}"]
    assert pt.G is not None
    return X, Sensitivities(V, H, pt.G, extra, st, layout.sample_position), pt.bad


def mat_vec(M: Array, v: Array) -> Array:
    """``M @ v`` for stacks of small matrices (…, a, b) and vectors (…, b): a loop over the
    short axis with long elementwise operations (faster than batched matmul for tiny b)."""
    out = M[..., 0] * v[..., None, 0]
    for i in range(1, M.shape[-1]):
        out += M[..., i] * v[..., None, i]
    return out


def mat_mat(M: Array, X: Array) -> Array:
    """``M @ X`` for stacks of small matrices (…, a, b) and (…, b, c), as :func:`mat_vec`."""
    out = M[..., :, 0, None] * X[..., None, 0, :]
    for i in range(1, M.shape[-1]):
        out += M[..., :, i, None] * X[..., None, i, :]
    return out


def _difference_quotients(Q: Array, z: Array, lam: Array) -> Array:
    """``(Qₖₗ − zₗ)/(λₖ − λₗ)`` off the diagonal (T, n, n)."""
    n = lam.shape[1]
    den = lam[:, :, None] - lam[:, None, :]
    den[:, np.arange(n), np.arange(n)] = 1.0
    return (Q - z[:, None, :]) / den
