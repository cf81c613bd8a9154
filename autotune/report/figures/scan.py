"""Figure: inversion against detuning for scans and lock steps."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from autotune.report.figures.base import (errorbar, finish_against_detuning, marker_of,
                                           new_figure)
from autotune.report.model import SCAN_LABELS, Run, level_label


def figure_scan(run: Run) -> tuple[Any, str] | None:
    """Figure 4: inversion against detuning for detuning scans and lock steps.

    Uses the measurements labelled as in :data:`SCAN_LABELS`. Returns ``(figure, caption)``, or
    None when the run has none.
    """
    done = [m for m in run.estimated if m.label in SCAN_LABELS and "detuning" in m.setpoints
            and math.isfinite(m.value("inversion"))]
    if not done:
        return None
    fig = new_figure()
    ax = fig.add_subplot()
    for label in dict.fromkeys(m.label for m in done):
        pick = [m for m in done if m.label == label]
        x = np.array([m.setpoints["detuning"] / 1e3 for m in pick])
        y = np.array([m.value("inversion") for m in pick])
        lo = np.array([m.value("inversion_low") for m in pick])
        hi = np.array([m.value("inversion_high") for m in pick])
        errorbar(ax, x, y, yerr=[y - lo, hi - y], fmt=marker_of(label), capsize=3, ms=6,
                    label=f"{label} ({len(pick)})", gid=f"scan-{label}")
    finish_against_detuning(fig, ax, run, run.chosen, ylabel="fringe inversion (dimensionless)",
                             title="detuning scan / lock steps", gid="chosen", label="chosen",
                             legend_size=8)
    caption = (f"Inversion against detuning for the measurements labelled "
               f"{', '.join(sorted({m.label for m in done}))}, with their "
               f"{level_label(run.confidence)} intervals; dashed: the chosen detuning.")
    return fig, caption


