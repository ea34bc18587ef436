"""The figure of a sampling design: the predicted curve with the sample times, and the
sensitivity function with the equivalence-theorem bound.

Drawn on figures made here (no pyplot state); the numbers come from the design record.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import seaborn as sns
from matplotlib.figure import Figure

__all__ = ["design_figure"]


def _palette(n: int) -> list[Any]:
    return list(sns.color_palette("colorblind", max(n, 1)))


def design_figure(d: Any) -> Figure:
    """Two panels: predictions with the sampling times (per group), and the sensitivity
    function (each sample moved alone for a population design) under its bound."""
    sns.set_theme(style="whitegrid")
    fig = Figure(figsize=(8.0, 6.4), layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True)
    tu = d.time_unit
    t = np.asarray(d.curve["time"])
    obs_colors = _palette(len(d.observed) + len(d.groups))
    for i, o in enumerate(d.observed):
        top.plot(t, d.curve["prediction"][o], color=obs_colors[i], lw=1.6,
                 label=f"{o} ({d.units.get(o, '')})")
    group_colors = obs_colors[len(d.observed):]
    for g, group in enumerate(d.groups):
        label = (f"group {g + 1}: {group.subjects} subjects" if d.population else "sample times")
        for j, time in enumerate(group.times):
            top.axvline(time, color=group_colors[g], ls="--", lw=1.0, label=label if j == 0 else None)
        for o in d.observed:
            at = np.interp(group.times, t, d.curve["prediction"][o])
            top.plot(group.times, at, "o", color=group_colors[g], ms=5, mec="white", zorder=3)
    top.set_ylabel("prediction" if len(d.observed) > 1 else f"{d.observed[0]} ({d.units.get(d.observed[0], '')})")
    top.legend(loc="best", fontsize=8, frameon=True)
    top.set_title(f"{d.template}: {d.criterion}-optimal sampling times", fontsize=11)
    s = d.sensitivity
    ts = np.asarray(s["time"])
    if "slices" in s:
        several = len(d.groups) > 1
        colors = _palette(len(s["slices"]))
        styles = ("-", "--", "-.", ":")
        for k, sl in enumerate(s["slices"]):
            g, i = sl["group"], sl["sample"]
            c = group_colors[g] if several else colors[k]
            label = f"group {g + 1}, sample {i + 1} moved" if several else f"sample {i + 1} moved"
            bottom.plot(ts, sl["value"], color=c, lw=1.3, ls=styles[i % len(styles)] if several else "-", label=label)
            at = d.groups[g].times[i]
            bottom.plot([at], [np.interp(at, ts, sl["value"])], "o", color=c, ms=5)
        bottom.set_ylabel("sensitivity d")
    else:
        bottom.plot(ts, s["value"], color=obs_colors[0], lw=1.5, label="sensitivity function d(t)")
        bottom.plot(s["design"], s["design_value"], "o", color=group_colors[0], ms=6, label="sample times")
        bottom.set_ylabel("sensitivity d(t)")
    bottom.axhline(s["bound"], color="0.3", ls=":", lw=1.2, label=f"equivalence-theorem bound ({s['bound']:.3g})")
    top_value = max(s["bound"], float(np.nanmax(_values(s))))
    bottom.set_ylim(0, top_value * 1.12)
    bottom.set_xlabel(f"time after the first dose ({tu})" if d.doses else f"time ({tu})")
    bottom.legend(loc="best", fontsize=8, frameon=True)
    bottom.set_xlim(d.window[0], d.window[1])
    return fig


def _values(s: Any) -> np.ndarray:
    if "slices" in s:
        return np.concatenate([np.asarray(sl["value"], dtype=float) for sl in s["slices"]])
    return np.asarray(s["value"], dtype=float)
