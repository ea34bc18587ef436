"""The flat data layout of a batch of subjects (built once, evaluated many times).

Everything that does not depend on the parameter values is laid out here once:

* **samples** ``(T,)``, ragged: time, subject, segment, observable index; subject ``s``
  owns rows ``sample_offsets[s]:sample_offsets[s + 1]`` in the order its times were given;
* **segments** ``(G,)``: each subject's stretch from time 0, or from a steady-state
  record, to the next such record (see :mod:`.schedule`); subject, start and, for a
  steady-state record, its regimen (route, amount, rate, duration, interval, tail start
  ``K``). Segments are numbered by decreasing number of terms, so that the first
  ``active[j]`` segments are those with more than ``j`` terms;
* **terms** ``(G, E)``, padded per segment to the largest count ``E``: the state a
  segment starts from (``START``), boluses (``BOLUS``: ``e^{A(t − s)} v``), the constant
  input ``b`` from the segment's start (``INPUT``) and each infusion's start and end
  (``ON``/``OFF``: steps of rate ``±r``, ``A⁻¹(e^{A(t − s)} − I) r``); each with record
  time, route (−1: none), state entered, amount or signed rate, lag parameter (−1: none)
  and ``real`` (False for padding).

The parameters enter in :mod:`.linear`, which sorts each segment's terms by their time
after lags and scans them in order, all segments at once.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..model import Model
from .schedule import Schedule

Array = NDArray[np.float64]
Index = NDArray[np.int64]

START, BOLUS, INPUT, ON, OFF = 0, 1, 2, 3, 4


@dataclass(frozen=True)
class Layout:
    """All θ-independent arrays of a batch (see the module docstring)."""

    n_subjects: int
    t: Array
    sample_subject: Index
    sample_segment: Index
    sample_obs: Index
    sample_offsets: Index
    sample_position: Index  # row of each sample within its subject
    seg_subject: Index
    seg_start: Array
    seg_steady: NDArray[np.bool_]
    seg_route: Index
    seg_amount: Array
    seg_rate: Array
    seg_duration: Array
    seg_interval: Array
    seg_tail: Index
    kind: Index  # (G, E)
    time: Array
    route: Index
    state: Index
    size: Array
    lag: Index
    real: NDArray[np.bool_]
    count: Index  # (G,) terms per segment
    active: Index  # (E,) segments with more than j terms
    lag_params: tuple[int, ...]  # parameters that shift some term (lag times)

    @property
    def rows(self) -> Index:
        """(G, 1) segment index, to pick per-segment orders with fancy indexing."""
        return np.arange(self.kind.shape[0])[:, None]

    @property
    def n_segments(self) -> int:
        return int(self.seg_subject.size)


def build_layout(model: Model, schedules: Sequence[Schedule], times: Sequence[Array],
                 obs: Sequence[Index], has_input: bool) -> Layout:
    """Lay out subjects (their schedules, sample times and observable indices)."""
    routes = list(model.routes)
    lag_of = [model.routes[r].lag_index for r in routes]
    state_of = [model.routes[r].state_index for r in routes]
    segs: list[tuple] = []
    terms: list[list[tuple]] = []
    t_all, subj_all, seg_all, obs_all, offsets = [], [], [], [], [0]
    for s, (sch, t, o) in enumerate(zip(schedules, times, obs, strict=True)):
        g0 = len(segs)
        for g in sch.segments:
            reg = g.regimen
            segs.append((s, g.start, reg is not None, -1 if reg is None else routes.index(reg.route),
                         0.0 if reg is None else reg.amount, 0.0 if reg is None else reg.rate,
                         0.0 if reg is None else reg.duration, g.interval, g.tail_from))
            rows = [(START, g.start, -1, -1, 0.0, -1)]
            if has_input:
                rows.append((INPUT, g.start, -1, -1, 0.0, -1))
            terms.append(rows)
        for pl in sch.pulses:
            ri = routes.index(pl.route)
            lag = -1 if lag_of[ri] is None else int(lag_of[ri])
            rows = terms[g0 + pl.segment]
            if pl.duration > 0:
                rows.append((ON, pl.time, ri, state_of[ri], pl.rate, lag))
                rows.append((OFF, pl.time + pl.duration, ri, state_of[ri], -pl.rate, lag))
            else:
                rows.append((BOLUS, pl.time, ri, state_of[ri], pl.amount, lag))
        tt = np.asarray(t, dtype=float)
        starts = np.array([g.start for g in sch.segments])
        t_all.append(tt)
        subj_all.append(np.full(tt.size, s, dtype=np.int64))
        seg_all.append(g0 + np.searchsorted(starts, tt, side="right") - 1)
        obs_all.append(np.asarray(o, dtype=np.int64))
        offsets.append(offsets[-1] + tt.size)
    count = np.array([len(r) for r in terms], dtype=np.int64)
    order = np.argsort(-count, kind="stable")  # segments by decreasing number of terms
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    G, E = count.size, int(count.max(initial=1))
    pad = np.zeros((G, E, 6))
    pad[:, :, 0] = -1  # padding: no kind
    pad[:, :, 2:4] = -1
    pad[:, :, 5] = -1
    for g, rows in enumerate(terms):
        pad[rank[g], : len(rows)] = rows
    real = np.arange(E)[None, :] < count[order][:, None]
    seg = np.array(segs, dtype=float).reshape(-1, 9)[order]
    ints = pad.astype(np.int64)
    empty = np.zeros(0, np.int64)
    return Layout(
        n_subjects=len(schedules), t=np.concatenate(t_all) if t_all else np.zeros(0),
        sample_subject=np.concatenate(subj_all) if subj_all else empty,
        sample_segment=rank[np.concatenate(seg_all).astype(np.int64)] if seg_all else empty,
        sample_obs=np.concatenate(obs_all) if obs_all else empty,
        sample_offsets=np.array(offsets, dtype=np.int64),
        sample_position=np.concatenate([np.arange(t.size) for t in t_all]).astype(np.int64) if t_all else empty,
        seg_subject=seg[:, 0].astype(np.int64), seg_start=seg[:, 1], seg_steady=seg[:, 2].astype(bool),
        seg_route=seg[:, 3].astype(np.int64), seg_amount=seg[:, 4], seg_rate=seg[:, 5], seg_duration=seg[:, 6],
        seg_interval=seg[:, 7], seg_tail=seg[:, 8].astype(np.int64),
        kind=ints[:, :, 0], time=pad[:, :, 1], route=ints[:, :, 2], state=ints[:, :, 3], size=pad[:, :, 4],
        lag=ints[:, :, 5], real=real, count=count[order],
        active=(count[order][None, :] > np.arange(E)[:, None]).sum(axis=1).astype(np.int64),
        lag_params=tuple(sorted({int(j) for j in ints[:, :, 5].ravel() if j >= 0})),
    )
