"""Many subjects in one call: a prepared :class:`Design` evaluated at many parameter sets.

A population estimator evaluates the same subjects thousands of times with changing
parameters. :func:`prepare` lays the subjects out once (:mod:`.layout`: ragged
concatenation of samples, flattened dose terms with segment ids, (sample, term) pairs);
:meth:`Design.evaluate` then computes the predictions of every sample and their Jacobian
with respect to the parameters (natural scale; all of them or a chosen subset) for one
parameter row per subject, in one vectorised pass for linear models (:mod:`.linear`),
subject by subject for nonlinear ones and for the rare linear subjects the eigen path
does not cover (matrix exponential).

Layout of the results: subject ``s`` owns the rows
``design.offsets[s]:design.offsets[s + 1]`` of ``predictions`` (T,) and ``jacobian``
(T, q), in the order its times were given; each row is the observable that sample
measures (``obs_index``).

Examples
--------
>>> import numpy as np
>>> from compartments import Dose, load_template
>>> from compartments.model import compiled
>>> m = compiled(load_template("one-comp-iv"))
>>> d = prepare(m, [([Dose(0, 100)], [1.0, 2.0]), ([Dose(0, 50)], [4.0])])
>>> y, J = d.evaluate(np.array([[0.1, 10.0], [0.2, 5.0]]), jacobian=True)
>>> np.round(y, 4).tolist(), J.shape
([9.0484, 8.1873, 4.4933], (3, 2))
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..errors import SimulationError, UsageError
from ..model import Model
from . import linear
from .kernels import LinearKernel, linear_kernel
from .layout import Layout, build_layout
from .schedule import Schedule, build_schedule, lag_bounds

Array = NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class Design:
    """Subjects laid out for repeated evaluation (see the module docstring).

    Attributes
    ----------
    model : Model
    schedules : tuple of Schedule
        Per subject.
    times : tuple of arrays, h
        Per subject, as given.
    obs_index : tuple of int arrays
        Per subject: which observable each sample measures.
    offsets : (N + 1,) int array
        Subject ``s`` owns result rows ``offsets[s]:offsets[s + 1]``.
    """

    model: Model
    schedules: tuple[Schedule, ...]
    times: tuple[Array, ...]
    obs_index: tuple[NDArray[np.int64], ...]
    offsets: NDArray[np.int64]
    layout: Layout | None
    kernel: LinearKernel | None

    @property
    def n_subjects(self) -> int:
        return len(self.schedules)

    @property
    def n_samples(self) -> int:
        return int(self.offsets[-1])

    def evaluate(self, theta: Array, *, jacobian: bool = False, free: Sequence[int] | None = None
                 ) -> tuple[Array, Array | None]:
        """Predictions (T,) and, with ``jacobian``, ∂prediction/∂θ (T, q).

        Parameters
        ----------
        theta : (N, p) or (p,) array
            One parameter row per subject (natural scale, template order); a single row is
            used for every subject.
        jacobian : bool
        free : sequence of int, optional
            Parameter indices to differentiate by (default: all, in template order).
        """
        th, fr = self._rows(theta, free)
        rows = th[self._subject]
        if self.kernel is None or self.layout is None:
            X, S = self._stepping(th, np.arange(self.n_subjects), jacobian, fr)
            return _observe_rows(self, rows, X, S, fr)
        X, sens, bad = linear.solve(self.model, self.kernel, self.layout, th, jacobian, fr)
        y, gx, gp = _observed(self, X, rows, fr, jacobian)
        J = None
        if jacobian:
            assert sens is not None and gx is not None and gp is not None
            J = sens.project(gx) + gp
        if bad.any():
            Xb, Sb = self._stepping(th, np.flatnonzero(bad), jacobian, fr)
            rb = np.concatenate([np.arange(self.offsets[s], self.offsets[s + 1]) for s in np.flatnonzero(bad)])
            X[rb] = Xb
            y, gx, gp = _observed(self, X, rows, fr, jacobian)
            if J is not None and gx is not None and gp is not None and Sb is not None:
                J[rb] = (gx[rb][:, :, None] * Sb).sum(axis=1) + gp[rb]
        _check_finite(self.model, y, J)
        return y, J

    def states(self, theta: Array, *, sensitivities: bool = False, free: Sequence[int] | None = None
               ) -> tuple[Array, Array | None, Array]:
        """States (T, n), their sensitivities (T, n, q) and the parameter row of each sample (T, p)."""
        th, fr = self._rows(theta, free)
        rows = th[self._subject]
        if self.kernel is None or self.layout is None:
            X, S = self._stepping(th, np.arange(self.n_subjects), sensitivities, fr)
        else:
            X, sens, bad = linear.solve(self.model, self.kernel, self.layout, th, sensitivities, fr)
            S = sens.states() if sens is not None else None
            if bad.any():
                Xb, Sb = self._stepping(th, np.flatnonzero(bad), sensitivities, fr)
                rb = np.concatenate([np.arange(self.offsets[s], self.offsets[s + 1]) for s in np.flatnonzero(bad)])
                X[rb] = Xb
                if S is not None and Sb is not None:
                    S[rb] = Sb
        _check_finite(self.model, X, S)
        return X, S, rows

    @property
    def _subject(self) -> NDArray[np.int64]:
        return np.repeat(np.arange(self.n_subjects), np.diff(self.offsets))

    def _rows(self, theta: Array, free: Sequence[int] | None) -> tuple[Array, NDArray[np.int64]]:
        m = self.model
        th = np.asarray(theta, dtype=float)
        if th.ndim == 1:
            th = np.broadcast_to(th, (self.n_subjects, th.size))
        if th.shape != (self.n_subjects, m.n_params):
            raise UsageError(f"theta must have shape ({self.n_subjects}, {m.n_params}) (one row per subject), "
                             f"got {th.shape}")
        return th, np.arange(m.n_params) if free is None else np.asarray(free, dtype=np.int64)

    def _stepping(self, th: Array, subjects: NDArray[np.int64], sens: bool, fr: NDArray[np.int64]
                  ) -> tuple[Array, Array | None]:
        """States and sensitivities of some subjects by the event-stepping path, stacked."""
        Xs, Ss = [], []
        for s in subjects:
            X, S = _one_subject(self.model, th[s], self.schedules[s], self.times[s], sens)
            Xs.append(X)
            Ss.append(None if S is None else S[:, :, fr])
        n = self.model.n_states
        X = np.concatenate(Xs) if Xs else np.zeros((0, n))
        S = (np.concatenate(Ss) if Ss else np.zeros((0, n, fr.size))) if sens else None
        return X, S


def _check_finite(model: Model, a: Array, b: Array | None) -> None:
    if not (np.all(np.isfinite(a)) and (b is None or np.all(np.isfinite(b)))):
        raise SimulationError(f"simulation of {model.template.name!r} produced non-finite values; "
                              "the parameters may be extreme for this model")


def _observed(design: Design, X: Array, rows: Array, fr: NDArray[np.int64], grad: bool
              ) -> tuple[Array, Array | None, Array | None]:
    """The observable each sample measures (T,), its gradient in the states (T, n) and in the
    free parameters (T, q), from the fused observation kernel."""
    kernel = design.kernel
    assert kernel is not None
    obs = design.layout.sample_obs  # type: ignore[union-attr]
    out = kernel.observe(X, rows)  # (m + m·n + m·p, T)
    nm, n, p = kernel.m, kernel.n, kernel.p
    if nm == 1:
        y = out[0]
        if not grad:
            return y, None, None
        return y, out[1:1 + n].T, out[1 + n:][fr].T
    idx = np.arange(X.shape[0])
    y = out[obs, idx]
    if not grad:
        return y, None, None
    gx = out[nm + obs[:, None] * n + np.arange(n)[None, :], idx[:, None]]
    gp = out[nm + nm * n + obs[:, None] * p + fr[None, :], idx[:, None]]
    return y, gx, gp


def _one_subject(model: Model, theta: Array, schedule: Schedule, t: Array, sens: bool
                 ) -> tuple[Array, Array | None]:
    """One subject by the event-stepping path (matrix exponential if linear, else LSODA)."""
    from . import solve_states

    return solve_states(model, theta, schedule, t, sens, method="expm" if model.is_linear else "ode")


def _observe_rows(design: Design, rows: Array, X: Array, S: Array | None, fr: NDArray[np.int64]
                  ) -> tuple[Array, Array | None]:
    """The observable each sample measures and its Jacobian, from the model's own functions
    (nonlinear models)."""
    m = design.model
    obs = np.concatenate(design.obs_index) if design.obs_index else np.zeros(0, np.int64)
    T = X.shape[0]
    Y = m.observe(X.T, rows.T)
    y = Y[obs, np.arange(T)]
    if S is None:
        _check_finite(m, y, None)
        return y, None
    gx = m.observe_jac_states(X.T, rows.T)
    gp = m.observe_jac_params(X.T, rows.T)
    gx = np.broadcast_to(gx if gx.ndim == 3 else gx[..., None], gx.shape[:2] + (T,))
    gp = np.broadcast_to(gp if gp.ndim == 3 else gp[..., None], gp.shape[:2] + (T,))
    idx = np.arange(T)
    J = (gx[obs, :, idx][:, :, None] * S).sum(axis=1) + gp[obs, :, idx][:, fr]
    _check_finite(m, y, J)
    return y, J


def prepare(model: Model, subjects: Sequence[Any], *, max_lag: Mapping[str, float] | None = None) -> Design:
    """Lay out ``subjects`` for repeated evaluation under ``model``.

    Parameters
    ----------
    model : Model
    subjects : sequence
        Each a pair ``(doses, times)``, a triple ``(doses, times, obs_index)``, or an object
        with ``doses`` and ``times`` (and optionally ``obs_index``) attributes, such as the
        estimator's subject data. Times in hours (≥ 0); ``obs_index`` says which observable
        each sample measures (default: the first).
    max_lag : mapping route -> float, h, optional
        Largest lag time the design will be evaluated at (default: the upper bound of each
        route's lag parameter); it decides how many doses before a steady-state record are
        listed explicitly.
    """
    lags = lag_bounds(model) if max_lag is None else dict(max_lag)
    schedules, times, obs = [], [], []
    for subj in subjects:
        if isinstance(subj, tuple):
            doses, t, *rest = subj
            o = rest[0] if rest else None
        else:
            doses, t, o = subj.doses, subj.times, getattr(subj, "obs_index", None)
        tt = np.asarray(t, dtype=float).reshape(-1)
        if tt.size and (not np.all(np.isfinite(tt)) or tt.min() < 0):
            raise UsageError("sample times must be finite and ≥ 0 (hours after the start)")
        oo = np.zeros(tt.size, np.int64) if o is None else np.asarray(o, dtype=np.int64).reshape(-1)
        if oo.shape != tt.shape or (oo.size and (oo.min() < 0 or oo.max() >= len(model.observable_names))):
            raise UsageError("obs_index needs one observable index per sample time, each within the model's "
                             f"{len(model.observable_names)} observables")
        schedules.append(doses if isinstance(doses, Schedule) else build_schedule(model, doses, lags))
        times.append(tt)
        obs.append(oo)
    offsets = np.cumsum([0] + [t.size for t in times]).astype(np.int64)
    kernel = linear_kernel(model) if model.is_linear else None
    layout = (build_layout(model, schedules, times, obs, kernel.has_input)
              if kernel is not None else None)
    return Design(model, tuple(schedules), tuple(times), tuple(obs), offsets, layout, kernel)
