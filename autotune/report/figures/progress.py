"""Figure: the best inversion so far against cumulative shots."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from autotune.report.figures.base import errorbar, new_figure, set_title
from autotune.report.model import Run, level_label


def figure_progress(run: Run) -> tuple[Any, str] | None:
    """Figure 2: the best inversion measured so far, with its interval, against cumulative shots.

    Returns ``(figure, caption)``, or None before the second estimate.
    """
    done = [m for m in run.estimated if math.isfinite(m.value("inversion"))]
    if len(done) < 2:
        return None
    fig = new_figure()
    ax = fig.add_subplot()
    shots = np.array([m.shots_after for m in done], dtype=float)
    inv = np.array([m.value("inversion") for m in done])
    low = np.array([m.value("inversion_low") for m in done])
    high = np.array([m.value("inversion_high") for m in done])
    best = np.zeros(len(done), dtype=int)
    for k in range(1, len(done)):
        best[k] = k if inv[k] > inv[best[k - 1]] else best[k - 1]
    ax.plot(shots, inv, ".", color="0.6", ms=4, label="each measurement", gid="measurements")
    ax.fill_between(shots, low[best], high[best], step="post", color="tab:blue", alpha=0.2,
                    label=f"its {level_label(run.confidence)} interval")
    ax.step(shots, inv[best], where="post", color="tab:blue", lw=1.8, label="best so far",
            gid="best-so-far")
    final = run.final_measurement()
    if final is not None and final in done:
        k = done.index(final)
        errorbar(ax, [shots[k]], [inv[k]], yerr=[[inv[k] - low[k]], [high[k] - inv[k]]], fmt="D",
                    color="tab:red", capsize=4, label=f"verified ({final.name})", gid="verified")
    from matplotlib.ticker import StrMethodFormatter

    ax.xaxis.set_major_formatter(StrMethodFormatter("{x:,.0f}"))
    ax.set_xlabel("cumulative shots (count)")
    ax.set_ylabel("fringe inversion (dimensionless)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="lower right")
    set_title(fig, run, "best inversion so far")
    caption = ("The largest inversion measured so far (line) with that measurement's "
               f"{level_label(run.confidence)} interval (band), against the shots acquired in the run; "
               "grey dots: every measurement. The maximum of noisy values is biased upward; the "
               "verification (red) is the unbiased figure.")
    return fig, caption


