"""Physics-informed trajectory network with a fixed hidden layer, solved by least squares.

The network stage (:mod:`compartments.estimate.pinn`) represents every state of the
template on each piece of the time axis as the output of a one-hidden-layer network
whose hidden layer is fixed: Chebyshev polynomials ``T_0 … T_{M-1}`` of a warped, scaled
time. Only the output weights ``W`` are learned. For given parameters ``θ`` the loss

    ‖data misfit through the observables / error-model scale‖²
    + λ² ‖ODE residual dx/dt − f(x, θ) − inputs at collocation nodes‖²
    + w_c² ‖initial conditions, bolus jumps, continuity between pieces‖²
    + μ ‖W‖²

is minimised over ``W`` in closed form (one linear least-squares solve when the
right-hand side and the observables are linear in the states, a few damped Gauss–Newton
steps otherwise). The parameters are then found by an outer search on the *profiled*
loss (the variable-projection idea of Golub & Pereyra 1973, SIAM J. Numer. Anal.
10:413; for ODEs, the generalized-profiling estimator of Ramsay, Hooker, Campbell & Cao
2007, J. R. Stat. Soc. B 69:741). Because the trajectory is fitted to the data and the
physics at once, this loss is much smoother in ``θ`` than the misfit of the exact
solution ("shooting"), which is what makes a start-free search work.

Devices (see the measurements in :mod:`compartments.estimate.pinn`):

* **Pieces.** Time is cut at every dose event (bolus, start/end of an infusion, after any
  lag); an interval holding more than ``samples_per_piece`` observations is cut further.
  A bolus is a jump in the continuity condition at the start of its piece; a zero-order
  infusion is a constant input over its pieces. A sample taken at a dose time sees the
  state before the dose, as in the simulator.
* **Warped time.** After a dose event, time runs on the log clock
  ``τ = log(1 + u/c) / log(1 + L/c)`` (``u`` the time since the event, ``L`` the interval,
  ``c`` half the first sampling time): every exponential phase becomes a transition of
  about the same width in τ, and the collocation nodes are densest right after the dose.
  Intervals not started by a dose (populations from t = 0) use a linear clock.
* **Scaled states.** Amount states are divided by a common scale ``S`` (total dose,
  largest observation, largest initial amount). States that start positive, receive no
  dose and are non-negative (populations) are represented through their logarithm (an
  ``exp`` output: positive by construction, and oscillating populations become smooth).
  Amount states (doses arrive in them, or they start at zero) stay linear in the output
  weights, so they are not positive by construction: an ``exp`` or softplus output would
  turn every inner solve of a linear model from one least-squares solve into an iterative
  one. The physics and data rows keep them near zero from below: at the stage's returned
  point the lowest value along the trajectory was within 0.02 % of the peak on the regular
  problem sets and reached −10 % of the peak in 3 of 60 hard problems
  (``benchmarks/pinn_design.py --positivity``); the likelihood stage that follows works on
  the exact solution, which is positive.
* **Residuals in data units.** The ODE residual of an amount state is multiplied by the
  gain from the states to the data, ``γ(θ) = S·sqrt(Σ_o Σ_i (∂g_o/∂x_i)² / ymax_o²)``
  (``S/V`` for a concentration), and, under a relative error model, divided by an
  envelope of the data (observations normalised to their maximum, interpolated
  log-linearly in time). Without this a small volume or the low late concentrations
  would let the trajectory bend the physics at no cost while fitting the data.
* **Exact-gradient outer search.** The outer Jacobian of the profiled residuals is the
  projected partial Jacobian ``(I − J_W (J_WᵀJ_W)⁻¹ J_Wᵀ) ∂r/∂θ`` (Kaufman 1975, BIT
  15:49), so the outer least-squares solver needs one inner solve per iterate.
"""

from __future__ import annotations

import weakref
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.polynomial import chebyshev as cheb
from numpy.typing import NDArray
from scipy.linalg import LinAlgError, cho_factor, cho_solve

from ..dosing import Dose
from ..model import Model
from .problem import Problem, SubjectData

Array = NDArray[np.float64]


@dataclass(frozen=True)
class Settings:
    """Numerical settings of the collocation network.

    Attributes
    ----------
    features : int
        Hidden units (Chebyshev polynomials, constant included) per piece and state.
    nodes : int
        Collocation nodes per piece.
    physics_weight : float
        λ: weight of the ODE residual relative to the data misfit.
    continuity_weight : float
        Weight of initial-condition, jump and continuity rows.
    ridge : float
        μ: Tikhonov penalty on the output weights (keeps the solve well posed).
    samples_per_piece : int
        An interval between dose events holding more observations than this is split
        into pieces.
    inner_iterations : int
        Gauss–Newton steps on the output weights for nonlinear models.
    """

    features: int = 16
    nodes: int = 24
    physics_weight: float = 3.0
    continuity_weight: float = 30.0
    ridge: float = 1e-8
    samples_per_piece: int = 10
    inner_iterations: int = 12


def _chebyshev_features(s: Array, m: int) -> tuple[Array, Array]:
    """Features ``T_j(s) − T_j(−1)`` (``j ≥ 1``) and 1, and their s-derivatives."""
    V = cheb.chebvander(s, m - 1)
    D = np.zeros_like(V)
    eye = np.eye(m)
    for j in range(1, m):
        D[:, j] = cheb.chebval(s, cheb.chebder(eye[j]))
    left = cheb.chebvander(np.array([-1.0]), m - 1)[0]
    V[:, 1:] -= left[1:]
    return V, D


def choose_warp(offsets: Array, length: float, after_event: bool) -> float:
    """Warp constant ``c`` (h) of an interval.

    After a dose event the solution is a sum of exponential phases, fast ones first, and
    sampling designs follow them: a log clock with ``c`` half the first sampling time
    (kept within 0.1 %–10 % of the interval) gives every phase the same width in τ.
    Without an event at its start (populations from t = 0) the clock is linear.

    Parameters
    ----------
    offsets : array, h
        Sample times after the start of the interval.
    length : float, h
        Interval length.
    after_event : bool
        Whether a dose event starts the interval.

    Returns
    -------
    float
        ``c``; ``inf`` means a linear clock.
    """
    if not after_event:
        return np.inf
    pos = offsets[(offsets > 0) & (offsets <= length)]
    first = float(pos.min()) if pos.size else 0.1 * length
    return float(np.clip(0.5 * first, 1e-3 * length, 0.1 * length))


def _warp(u: Array, length: float, c: float) -> Array:
    """τ(u) in [0, 1]."""
    if not np.isfinite(c):
        return u / length
    return np.log1p(u / c) / np.log1p(length / c)


def _unwarp(tau: Array, length: float, c: float) -> tuple[Array, Array]:
    """u(τ) and du/dτ."""
    if not np.isfinite(c):
        return tau * length, np.full_like(tau, length)
    lg = np.log1p(length / c)
    u = c * np.expm1(tau * lg)
    return u, (c + u) * lg


@dataclass(frozen=True)
class _Event:
    time: float
    state: int
    amount: float  # bolus amount before bioavailability
    rate: float  # change of infusion rate before bioavailability
    route: str


@dataclass
class Layout:
    """Pieces of the time axis and the fixed features evaluated on them."""

    starts: Array  # (P,)
    stops: Array  # (P,)
    dtds: Array  # (P, K): dt/ds at the nodes of each piece
    piece_of_row: NDArray[np.int64]  # (nd,) piece of each data row, -1: before any piece
    Pd: Array  # (nd, M) features at each data row (zeros for rows before any piece)
    events_at: list[list[_Event]]  # events applied at each piece start
    active: list[list[_Event]]  # events whose rate is in force during each piece
    node_weight: Array  # (P, K): 1/envelope at the nodes (amount states)
    start_weight: Array  # (P,): 1/envelope at each piece start

    @property
    def n_pieces(self) -> int:
        return int(self.starts.size)


class Collocation:
    """The profiled physics-informed loss of one problem.

    Parameters
    ----------
    problem : Problem
        One subject or several pooled (one trajectory set per subject).
    settings : Settings

    Notes
    -----
    Pooled problems are handled subject by subject, each with its own output weights and
    the shared parameters; the residual vectors are stacked.
    """

    def __init__(self, problem: Problem, settings: Settings = Settings()):
        self.problem = problem
        self.model: Model = problem.model
        self.settings = settings
        m = self.model
        self.n = m.n_states
        self.M = int(settings.features)
        self.K = int(settings.nodes)
        # collocation nodes (Chebyshev–Gauss) and the shared features on [-1, 1]
        s_nodes = -np.cos(np.pi * (np.arange(self.K) + 0.5) / self.K)
        self.Pc, self.dPc = _chebyshev_features(s_nodes, self.M)
        self.s_nodes = s_nodes
        self.Pend = _chebyshev_features(np.array([1.0]), self.M)[0][0]
        self.free = np.asarray(problem.free, dtype=np.int64)
        self.log_mask = problem.log_mask
        self.dose_states = {r.state_index for r in m.routes.values()}
        self.gains = _gains(m)
        self.obs_linear = self.gains.linear
        self.linear = bool(m.is_linear and self.obs_linear)
        self.subjects = [_Subject(self, d) for d in problem.data]

    # -- one evaluation --------------------------------------------------------------
    def profile(self, phi: Array, warm: Sequence[Array] | None = None, *, jacobian: bool = False,
                weight: float | None = None) -> tuple[float, Array, Array | None, list[Array]]:
        """Minimise over the output weights at ``phi``.

        Returns
        -------
        cost : float
            Profiled loss (sum of squared residuals).
        r : array
            Residuals at the inner optimum.
        J : array or None
            Jacobian of ``r`` along the profile with respect to ``phi`` (if requested).
        z : list of arrays
            Output weights per subject (to warm-start the next evaluation).

        Other Parameters
        ----------------
        weight : float, optional
            Physics weight λ for this evaluation (default: the settings').
        """
        lam = self.settings.physics_weight if weight is None else float(weight)
        theta = self.problem.full_theta(np.asarray(phi, dtype=float))
        dtheta = np.where(self.log_mask, theta[self.free], 1.0)
        rs, Js, zs = [], [], []
        for k, sub in enumerate(self.subjects):
            z0 = None if warm is None else warm[k]
            r, Jphi, z = sub.solve(theta, z0, jacobian, lam)
            rs.append(r)
            zs.append(z)
            if jacobian:
                assert Jphi is not None
                Js.append(Jphi[:, self.free] * dtheta)
        r = np.concatenate(rs)
        J = np.concatenate(Js) if jacobian else None
        return float(r @ r), r, J, zs


@dataclass(frozen=True)
class _Gains:
    """Squared state-to-observable gains ``h_o(θ) = Σ_i (∂g_o/∂x_i)²`` and their gradients.

    Only built when every observable is affine in the states (then the gains do not
    depend on the states).
    """

    linear: bool
    h: Callable[..., Array] | None = None  # θ -> (m, 1)
    dh: Callable[..., Array] | None = None  # θ -> (m, p)


_GAINS: weakref.WeakKeyDictionary[Model, _Gains] = weakref.WeakKeyDictionary()


def _gains(model: Model) -> _Gains:
    """Compile (once per model) whether the observables are affine and their gains."""
    found = _GAINS.get(model)
    if found is not None:
        return found
    import sympy as sp

    xs = {n: sp.Symbol(n, real=True) for n in model.state_names}
    ps = [sp.Symbol(n, real=True) for n in model.parameter_names]
    by_name = {**xs, **{q.name: q for q in ps}}
    rows = []
    linear = True
    for o in model.template.observables:
        e = o.expression
        e = e.xreplace({q: by_name[q.name] for q in e.free_symbols if q.name in by_name})
        grads = [sp.diff(e, x) for x in xs.values()]
        if any(g.free_symbols & set(xs.values()) for g in grads):
            linear = False
            break
        rows.append(sum((g**2 for g in grads), sp.Integer(0)))
    if not linear:
        out = _Gains(False)
    else:
        h = sp.lambdify(ps, [[r] for r in rows], modules="numpy")
        dh = sp.lambdify(ps, [[sp.diff(r, q) for q in ps] for r in rows], modules="numpy")
        n_obs, n_par = len(rows), len(ps)
        out = _Gains(
            True,
            lambda *t: np.array(h(*t), dtype=float).reshape(n_obs, 1),
            lambda *t: np.array(dh(*t), dtype=float).reshape(n_obs, n_par),
        )
    _GAINS[model] = out
    return out


class _Subject:
    """Layout, residuals and inner solve for one subject's data."""

    def __init__(self, owner: Collocation, data: SubjectData):
        self.o = owner
        m = owner.model
        keep = ~np.asarray(data.censored, dtype=bool)
        self.t = np.asarray(data.times, dtype=float)[keep]
        self.y = np.asarray(data.values, dtype=float)[keep]
        self.oi = np.asarray(data.obs_index, dtype=np.int64)[keep]
        self.doses: tuple[Dose, ...] = tuple(data.doses)
        self.nd = int(self.y.size)
        self.sigma = _data_scale(self.y, self.oi, owner.problem.error, len(m.observable_names))
        seen = [k for k in range(len(m.observable_names)) if np.any((self.oi == k) & (self.y != 0))]
        self.obs_seen = np.asarray(seen, dtype=np.int64)
        self.ymax = np.array([np.max(np.abs(self.y[self.oi == k])) for k in seen], dtype=float)
        # common amount scale (θ-independent so the loss does not favour large states)
        x0 = np.abs(m.initial(m.defaults))
        total = sum(float(d.amount) for d in self.doses)
        ymax = float(np.max(np.abs(self.y))) if self.nd else 0.0
        self.scale = max(total, ymax, float(x0.max()) if x0.size else 0.0, 1e-12)
        # states represented by their logarithm: positive start, no dose, non-negative
        amount = np.array([s.amount for s in m.template.states], dtype=bool)
        self.log_state = amount & (x0 > 0) & ~np.isin(np.arange(owner.n), list(owner.dose_states))
        self._layout: Layout | None = None
        self._layout_key: tuple[float, ...] | None = None

    def envelope(self, t: Array) -> Array:
        """Typical size of the amount states at times ``t``, as a fraction of the scale.

        Under a relative error model the data constrain small late concentrations as
        tightly as the peak, so the ODE residual of amount states is measured relative to
        the size of the solution there: the observations of each observable, normalised
        to their maximum and interpolated log-linearly in time (constant beyond the
        first and last), the largest over observables, floored. Under additive error the
        envelope is 1 (absolute residuals throughout).
        """
        error = self.o.problem.error
        if error == "additive" or not self.nd:
            return np.ones_like(t)
        floor = 1e-4 if error in ("proportional", "lognormal") else 0.05
        env = np.full(t.shape, floor)
        for k in np.unique(self.oi):
            sel = (self.oi == k) & (np.abs(self.y) > 0)
            if not sel.any():
                continue
            tt, yy = self.t[sel], np.abs(self.y[sel])
            order = np.argsort(tt, kind="stable")
            tt, yy = tt[order], np.log(yy[order] / yy.max())
            env = np.maximum(env, np.exp(np.interp(t, tt, yy)))
        return env

    # -- layout ---------------------------------------------------------------------------
    def events(self, theta: Array) -> list[_Event]:
        m = self.o.model
        out: list[_Event] = []
        for d in self.doses:
            entry = m.routes.get(d.route)
            if entry is None and d.route == "infusion":
                entry = m.routes.get("iv")
            if entry is None:
                continue  # the Problem/simulator reports unknown routes
            lag = float(theta[entry.lag_index]) if entry.lag_index is not None else 0.0
            t0 = float(d.time) + max(lag, 0.0)
            if d.route == "infusion":
                out.append(_Event(t0, entry.state_index, 0.0, d.infusion_rate, entry.route))
                out.append(_Event(t0 + d.infusion_duration, entry.state_index, 0.0, -d.infusion_rate, entry.route))
            else:
                out.append(_Event(t0, entry.state_index, float(d.amount), 0.0, entry.route))
        out.sort(key=lambda e: e.time)
        return out

    def layout(self, theta: Array) -> Layout:
        evs = self.events(theta)
        key = tuple(e.time for e in evs)
        if self._layout is not None and key == self._layout_key:
            return self._layout
        o = self.o
        st = o.settings
        tmax = float(self.t.max()) if self.nd else 0.0
        cuts = sorted({0.0} | {e.time for e in evs if e.time < tmax})
        starts, stops, dtds_rows = [], [], []
        node_times: list[Array] = []
        piece_of_row = np.full(self.nd, -1, dtype=np.int64)
        s_of_row = np.zeros(self.nd)
        events_at: list[list[_Event]] = []
        active: list[list[_Event]] = []
        for j, a in enumerate(cuts):
            b = cuts[j + 1] if j + 1 < len(cuts) else tmax
            if b <= a:
                continue
            rows = np.nonzero((self.t > a) & (self.t <= b))[0]
            length = b - a
            after_event = any(e.time == a for e in evs)
            c = choose_warp(self.t[rows] - a, length, after_event)
            n_pieces = max(1, int(np.ceil(rows.size / max(st.samples_per_piece, 1))))
            tau_rows = _warp(self.t[rows] - a, length, c)
            edges = np.linspace(0.0, 1.0, n_pieces + 1)
            for q in range(n_pieces):
                ta, tb = edges[q], edges[q + 1]
                tau_nodes = ta + (tb - ta) * 0.5 * (o.s_nodes + 1.0)
                u_nodes, du_dtau = _unwarp(tau_nodes, length, c)
                ua = _unwarp(np.array([ta]), length, c)[0][0]
                ub = _unwarp(np.array([tb]), length, c)[0][0]
                pidx = len(starts)
                starts.append(a + ua)
                stops.append(a + ub)
                dtds_rows.append(du_dtau * 0.5 * (tb - ta))
                node_times.append(a + u_nodes)
                q_rows = np.clip(np.ceil(tau_rows * n_pieces).astype(np.int64) - 1, 0, n_pieces - 1)
                sel = rows[q_rows == q]
                piece_of_row[sel] = pidx
                s_of_row[sel] = 2.0 * (np.clip(tau_rows[q_rows == q], ta, tb) - ta) / (tb - ta) - 1.0
                events_at.append([e for e in evs if e.time == a] if q == 0 else [])
                active.append([e for e in evs if e.time <= a + ua and e.rate != 0.0])
        M = o.M
        Pd = np.zeros((self.nd, M))
        inpiece = piece_of_row >= 0
        if inpiece.any():
            Pd[inpiece] = _chebyshev_features(s_of_row[inpiece], M)[0]
        lay = Layout(
            starts=np.asarray(starts),
            stops=np.asarray(stops),
            dtds=np.asarray(dtds_rows).reshape(len(starts), o.K),
            piece_of_row=piece_of_row,
            Pd=Pd,
            events_at=events_at,
            active=active,
            node_weight=1.0 / self.envelope(np.asarray(node_times).reshape(len(starts), o.K)),
            start_weight=1.0 / self.envelope(np.asarray(starts)),
        )
        self._layout, self._layout_key = lay, key
        return lay

    # -- per-θ quantities ------------------------------------------------------------------
    def context(self, theta: Array, lay: Layout, want_grad: bool, weight: float) -> _Context:
        """Inputs, jumps, initial state and (linear models) the system matrices at ``theta``."""
        m = self.o.model
        n, p = self.o.n, m.n_params
        P = lay.n_pieces
        u = np.zeros((P, n))
        jump = np.zeros((P, n))
        du = np.zeros((P, n, p))
        djump = np.zeros((P, n, p))
        cache: dict[str, tuple[float, Array]] = {}

        def bio(route: str) -> tuple[float, Array]:
            if route not in cache:
                r = m.routes[route]
                F = float(r.bioavailability(*theta).reshape(-1)[0])
                dF = r.bioavailability_grad(*theta).reshape(-1) if want_grad else np.zeros(p)
                cache[route] = (F, dF)
            return cache[route]

        for q in range(P):
            for e in lay.active[q]:
                F, dF = bio(e.route)
                u[q, e.state] += e.rate * F
                du[q, e.state] += e.rate * dF
            for e in lay.events_at[q]:
                if e.amount:
                    F, dF = bio(e.route)
                    jump[q, e.state] += e.amount * F
                    djump[q, e.state] += e.amount * dF
        x0 = m.initial(theta)
        x0p = m.initial_jac(theta).reshape(n, p) if want_grad else None
        lin = m.linear_parts(theta) if m.is_linear else None
        gamma, dgamma = self.gain(theta, want_grad)
        return _Context(theta, weight, u, jump, du, djump, x0, x0p, lin, gamma, dgamma)

    def gain(self, theta: Array, want_grad: bool) -> tuple[float, Array]:
        """Factor turning an amount-state residual into data units, and its θ-gradient.

        ``γ(θ) = sqrt(Σ_o h_o(θ) / ymax_o²) · S``: the size, relative to the data, of a unit
        of the scaled states as the observables see it (``1/V`` for a concentration). An
        ODE residual that would not move the observables by much is cheap otherwise, and
        a small volume would let the trajectory bend the physics at no cost. Nonlinear
        observables use ``γ = 1``.
        """
        p = self.o.model.n_params
        g = self.o.gains
        if not g.linear or not self.ymax.size:
            return 1.0, np.zeros(p)
        assert g.h is not None and g.dh is not None
        h = g.h(*theta)[self.obs_seen, 0]
        w = 1.0 / self.ymax**2
        tot = float(np.sum(w * h))
        if not (tot > 0 and np.isfinite(tot)):
            return 1.0, np.zeros(p)
        gamma = np.sqrt(tot) * self.scale
        dgamma = (w @ g.dh(*theta)[self.obs_seen]) * self.scale**2 / (2.0 * gamma) if want_grad else np.zeros(p)
        return float(gamma), dgamma

    def _rhs(self, X: Array, ctx: _Context, want_fx: bool, want_fp: bool
             ) -> tuple[Array, Array | None, Array | None]:
        """f (n, T), f_x (n, n, T) and f_θ (n, p, T) at the states X (n, T)."""
        m = self.o.model
        n, p = self.o.n, m.n_params
        T = X.shape[1]
        theta = ctx.theta
        if ctx.linear is not None:
            A, b, Ap, bp = ctx.linear
            f = A @ X + b[:, None]
            fx = np.broadcast_to(A[:, :, None], (n, n, T)) if want_fx else None
            fp = (np.einsum("jil,lt->ijt", Ap, X) + bp[:, :, None]) if want_fp else None
            return f, fx, fp
        f = np.broadcast_to(m._f(*X, *theta).reshape(n, -1), (n, T))
        fx = np.broadcast_to(m._fx(*X, *theta).reshape(n, n, -1), (n, n, T)) if want_fx else None
        fp = np.broadcast_to(m._fp(*X, *theta).reshape(n, p, -1), (n, p, T)) if want_fp else None
        return f, fx, fp

    # -- residuals ------------------------------------------------------------------------
    def residual(self, z: Array, ctx: _Context, lay: Layout, want_jz: bool, want_jt: bool
                 ) -> tuple[Array, Array | None, Array | None]:
        """Residuals and their Jacobians in the output weights and in θ (all parameters)."""
        o = self.o
        m = o.model
        st = o.settings
        theta = ctx.theta
        n, M, K, S = o.n, o.M, o.K, self.scale
        nM = n * M
        P = lay.n_pieces
        p = m.n_params
        nd = self.nd
        W = z.reshape(P, n, M)
        lg = self.log_state
        wp = ctx.weight * np.sqrt(max(nd, 1) / (n * K * P))
        wc = st.continuity_weight
        sm = np.sqrt(st.ridge)
        n_phys, n_cont, n_ridge = n * P * K, n * P, P * n * (M - 1)
        R = n_phys + n_cont + nd + n_ridge
        r = np.empty(R)
        Jz = np.zeros((R, P * nM)) if want_jz else None
        Jt = np.zeros((R, p)) if want_jt else None
        any_log = bool(lg.any())

        # physics ------------------------------------------------------------------------
        V = np.einsum("qim,km->iqk", W, o.Pc)  # representation (n, P, K)
        D = np.einsum("qim,km->iqk", W, o.dPc)  # its s-derivative
        if any_log:
            X = np.where(lg[:, None, None], np.exp(np.minimum(V, 700.0)), V * S)
            div = np.where(lg[:, None, None], X, S)  # dv/dt = rate / div
        else:
            X = V * S
            div = S
        f, fx, fp = self._rhs(X.reshape(n, P * K), ctx, want_jz, want_jt)
        rate = f.reshape(n, P, K) + ctx.u.T[:, :, None]
        # per-node weights: relative (envelope) for amount states, 1 for log states
        gam = ctx.gamma
        pw = wp * np.where(lg[:, None, None], 1.0, gam * lay.node_weight[None])  # (n, P, K)
        r[:n_phys] = (pw * (D - lay.dtds[None] * rate / div)).reshape(-1)
        if want_jz:
            assert Jz is not None and fx is not None
            fx4 = fx.reshape(n, n, P, K)
            if any_log:
                A = fx4 * div[None] / div[:, None]  # d(rate_i/div_i)/dv_l, div_l = dX_l/dv_l
                for i in np.nonzero(lg)[0]:
                    A[i, i] = A[i, i] - rate[i] / X[i]
            else:
                A = fx4
            T = np.einsum("ilqk,km->qikml", -pw[:, None] * A * lay.dtds[None, None], o.Pc)  # (P, n, K, M, n)
            T = np.ascontiguousarray(T.transpose(0, 1, 2, 4, 3))  # (P, i, K, l, M)
            for i in range(n):
                T[:, i, :, i, :] += pw[i][:, :, None] * o.dPc[None]
            J4 = Jz[:n_phys].reshape(n, P, K, P, nM)
            Tq = T.reshape(P, n, K, nM)
            for q in range(P):
                J4[:, q, :, q, :] = Tq[q]
        if want_jt:
            assert Jt is not None and fp is not None
            ft = fp.reshape(n, p, P, K) + ctx.du.transpose(1, 2, 0)[:, :, :, None]
            dv = div[:, None] if any_log else div
            Jt[:n_phys] = (-pw[:, None] * lay.dtds[None, None] * ft / dv).transpose(0, 2, 3, 1).reshape(n_phys, p)
            if not lg.all() and np.any(ctx.dgamma):
                amount_rows = np.repeat(~lg, P * K)
                Jt[:n_phys][amount_rows] += np.outer(r[:n_phys][amount_rows], ctx.dgamma / gam)

        # initial conditions, jumps, continuity ----------------------------------------------
        row = n_phys
        start = ctx.x0 + ctx.jump[0]
        safe = np.maximum(start, 1e-12 * S)
        ref = np.empty((P, n))
        ref[0] = np.where(lg, np.log(safe), start / S)
        if P > 1:
            ref[1:] = W[:-1] @ o.Pend + np.where(lg, 0.0, ctx.jump[1:] / S)
        cw = wc * np.where(lg[None, :], 1.0, gam * lay.start_weight[:, None])  # (P, n)
        r[row:row + n_cont] = (cw * (W[:, :, 0] - ref)).reshape(-1)
        if want_jz:
            assert Jz is not None
            idx = np.arange(P * n)
            Jz[row + idx, idx * M] = cw.reshape(-1)
            for q in range(1, P):
                for i in range(n):
                    c0 = ((q - 1) * n + i) * M
                    Jz[row + q * n + i, c0:c0 + M] = -cw[q, i] * o.Pend
        if want_jt:
            assert Jt is not None and ctx.x0p is not None
            d0 = ctx.x0p + ctx.djump[0]
            Jt[row:row + n] = -cw[0][:, None] * np.where(lg[:, None], d0 / safe[:, None], d0 / S)
            if P > 1:
                Jt[row + n:row + n_cont] = (-cw[1:, :, None] * np.where(lg[None, :, None], 0.0, ctx.djump[1:] / S)).reshape(-1, p)
            if not lg.all() and np.any(ctx.dgamma):
                amount_rows = np.tile(~lg, P)
                Jt[row:row + n_cont][amount_rows] += np.outer(r[row:row + n_cont][amount_rows], ctx.dgamma / gam)
        row += n_cont

        # data ---------------------------------------------------------------------------
        if nd:
            pr = lay.piece_of_row
            inside = pr >= 0
            Vd = np.einsum("rim,rm->ir", W[np.maximum(pr, 0)], lay.Pd)  # (n, nd)
            Xd = np.where(lg[:, None], np.exp(np.minimum(Vd, 700.0)), Vd * S) if any_log else Vd * S
            if not inside.all():
                Xd[:, ~inside] = ctx.x0[:, None]
            nobs = len(m.observable_names)
            g = np.broadcast_to(m._g(*Xd, *theta).reshape(nobs, -1), (nobs, nd))
            rows = np.arange(nd)
            r[row:row + nd] = (g[self.oi, rows] - self.y) / self.sigma
            if want_jz or want_jt:
                gx = np.broadcast_to(m._gx(*Xd, *theta).reshape(nobs, n, -1), (nobs, n, nd))
                gsel = gx[self.oi, :, rows]  # (nd, n)
            if want_jz:
                assert Jz is not None
                dXdv = np.where(lg[:, None], Xd, S) if any_log else np.full((n, nd), S)
                blk = (gsel * dXdv.T)[:, :, None] * lay.Pd[:, None, :] / self.sigma[:, None, None]
                ins = np.nonzero(inside)[0]
                cols = pr[ins][:, None] * nM + np.arange(nM)[None, :]
                Jz[row + ins[:, None], cols] = blk[ins].reshape(-1, nM)
            if want_jt:
                assert Jt is not None
                gt = np.broadcast_to(m._gp(*Xd, *theta).reshape(nobs, p, -1), (nobs, p, nd))
                gts = np.array(gt[self.oi, :, rows])  # (nd, p)
                if not inside.all():
                    assert ctx.x0p is not None
                    gts[~inside] += gsel[~inside] @ ctx.x0p
                Jt[row:row + nd] = gts / self.sigma[:, None]
        row += nd

        # ridge --------------------------------------------------------------------------
        r[row:] = sm * W[:, :, 1:].reshape(-1)
        if want_jz:
            assert Jz is not None
            cols = (np.arange(P * n)[:, None] * M + np.arange(1, M)[None, :]).reshape(-1)
            Jz[row + np.arange(cols.size), cols] = sm
        if want_jt:
            assert Jt is not None
            Jt[row:] = 0.0
        return r, Jz, Jt

    def initial_weights(self, ctx: _Context, lay: Layout) -> Array:
        """Constant trajectories at the initial state (log or scaled)."""
        o = self.o
        S = self.scale
        v0 = np.where(self.log_state, np.log(np.maximum(ctx.x0, 1e-12 * S)), ctx.x0 / S)
        W = np.zeros((lay.n_pieces, o.n, o.M))
        W[:, :, 0] = v0
        return W.reshape(-1)

    def solve(self, theta: Array, z0: Array | None, jacobian: bool, weight: float
              ) -> tuple[Array, Array | None, Array]:
        """Inner minimisation over the output weights; projected θ-Jacobian if asked."""
        o = self.o
        lay = self.layout(theta)
        ctx = self.context(theta, lay, jacobian, weight)
        nz = lay.n_pieces * o.n * o.M
        z = self.initial_weights(ctx, lay) if z0 is None or z0.size != nz else z0.copy()
        r, Jz, _ = self.residual(z, ctx, lay, True, False)
        assert Jz is not None
        cost = float(r @ r)
        damp = 0.0
        fac = None
        for _ in range(1 if o.linear else o.settings.inner_iterations):
            G = Jz.T @ Jz
            g = Jz.T @ r
            if damp:
                G = G + damp * np.diag(np.diag(G))
            try:
                fac = cho_factor(G, check_finite=False)
                step = -cho_solve(fac, g, check_finite=False)
            except (LinAlgError, ValueError):
                fac = None
                step = -np.linalg.lstsq(G, g, rcond=None)[0]
            if o.linear:  # residuals are affine in the weights: exact after one step
                z = z + step
                r = r + Jz @ step
                break
            if -float(g @ step) <= 1e-8 * (1.0 + cost):  # predicted gain negligible: converged
                break
            zn = z + step
            rn, Jn, _ = self.residual(zn, ctx, lay, True, False)
            assert Jn is not None
            cn = float(rn @ rn)
            if np.isfinite(cn) and cn < cost:
                small = cost - cn <= 1e-6 * (1.0 + cost)
                z, r, Jz, cost = zn, rn, Jn, cn
                damp = damp * 0.1 if damp > 1e-7 else 0.0
                if small:
                    break
            else:
                damp = max(10.0 * damp, 1e-4)
                if damp > 1e6:
                    break
        Jphi = None
        if jacobian:
            _, _, Jt = self.residual(z, ctx, lay, False, True)
            if not o.linear:
                fac = None  # the last factor was of an earlier (or damped) matrix
            assert Jz is not None and Jt is not None
            rhs = Jz.T @ Jt
            try:
                if fac is None:
                    fac = cho_factor(Jz.T @ Jz, check_finite=False)
                proj = cho_solve(fac, rhs, check_finite=False)
            except (LinAlgError, ValueError):
                proj = np.linalg.lstsq(Jz.T @ Jz, rhs, rcond=None)[0]
            Jphi = Jt - Jz @ proj
        return r, Jphi, z


@dataclass(frozen=True)
class _Context:
    """Quantities that depend on θ only (not on the output weights)."""

    theta: Array
    weight: float  # physics weight λ
    u: Array  # (P, n) infusion input in force on each piece
    jump: Array  # (P, n) bolus arriving at each piece start
    du: Array  # (P, n, p)
    djump: Array  # (P, n, p)
    x0: Array  # (n,)
    x0p: Array | None  # (n, p)
    linear: tuple[Array, Array, Array, Array] | None  # A, b, dA/dθ, db/dθ of a linear model
    gamma: float  # amount residual -> data units
    dgamma: Array  # (p,)


def _data_scale(y: Array, oi: NDArray[np.int64], error: str, n_obs: int) -> Array:
    """Scale of each observation's residual under the error model (scale-free)."""
    sig = np.ones(y.size)
    for k in range(n_obs):
        sel = oi == k
        if not sel.any():
            continue
        ymax = float(np.max(np.abs(y[sel])))
        ymax = ymax if ymax > 0 else 1.0
        rms = float(np.sqrt(np.mean(y[sel] ** 2))) or 1.0
        if error == "additive":
            sig[sel] = rms
        elif error == "combined":
            sig[sel] = np.sqrt((0.1 * rms) ** 2 + y[sel] ** 2)
        else:  # proportional, lognormal: relative residuals
            sig[sel] = np.maximum(np.abs(y[sel]), 0.02 * ymax)
    return sig
