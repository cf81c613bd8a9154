"""Figure: the photon phase shift against detuning."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from autotune.report.figures._base import _new_figure, _title
from autotune.report.model import Run


def figure_phase_shift(run: Run) -> tuple[Any, str] | None:
    """Figure 5: photon phase shift (units of pi) against detuning, wherever measured.

    Returns ``(figure, caption)``, or None with fewer than two identified estimates.
    """
    done = [m for m in run.estimated if "detuning" in m.setpoints
            and m.estimate.get("identified", True) and math.isfinite(m.value("phase_shift"))]
    if len(done) < 2:
        return None
    fig = _new_figure()
    ax = fig.add_subplot()
    x = np.array([m.setpoints["detuning"] / 1e3 for m in done])
    y = np.array([m.value("phase_shift") / math.pi for m in done])
    e = np.array([m.value("phase_shift_stderr") / math.pi for m in done])
    ax.errorbar(x, y, yerr=np.where(np.isfinite(e), e, 0.0), fmt="none", ecolor="0.5",
                capsize=2, lw=0.8, zorder=1)
    vel = [m.setpoints.get("velocity", math.nan) for m in done]
    if all(math.isfinite(v) for v in vel) and np.ptp(vel) > 0:
        sc = ax.scatter(x, y, c=vel, cmap="plasma", s=24, zorder=2, gid="phase-shift")
        fig.colorbar(sc, ax=ax, label="velocity set-point (m/s)")
    else:
        ax.scatter(x, y, color="tab:blue", s=24, zorder=2, gid="phase-shift")
    ax.axhline(1.0, color="black", lw=1.0, ls=":", label="π (the 2π condition)")
    final = run.final_measurement()
    if final is not None and final in done:
        ax.plot(final.setpoints["detuning"] / 1e3, final.value("phase_shift") / math.pi,
                marker="*", ms=16, mfc="none", mec="red", mew=1.6, ls="none", gid="chosen",
                label=f"chosen ({final.name})")
    ax.set_xlabel("detuning set-point (kHz)")
    ax.set_ylabel("photon phase shift (π rad)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="best")
    _title(fig, run, "photon phase shift")
    caption = ("The angle between the one-photon and the empty fringe, in units of π, with one "
               "standard error, at every measured point, coloured by velocity. At the 2π "
               "condition it is π; detuning turns it one way or the other (PHYSICS.md §5b).")
    return fig, caption


