"""Figure: the measured points over the (velocity, detuning) box."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from autotune.report.figures.base import marker_of, new_figure, set_title
from autotune.report.model import SEARCH_LABELS, Run, read_setpoints


def figure_map(run: Run) -> tuple[Any, str] | None:
    """Figure: the measured points over the (velocity, detuning) box, in the order measured.

    Search points are numbered in order; other labels get their own markers; the colour is the
    measured inversion (with its colour bar). No surface is drawn: the model that chose the
    points is the phase lock's curves (the phase-shift and absorption figures), and a surface
    the report fitted itself would not be the one that decided. Returns
    ``(figure, caption)``, or None with fewer than two measurements that have both set-points
    (the header gives a single point).
    """
    done = [m for m in run.estimated if {"velocity", "detuning"} <= set(m.setpoints)
            and math.isfinite(m.value("inversion"))]
    if len(done) < 2:
        return None
    fig = new_figure(7.5, 5.2)
    ax = fig.add_subplot()
    vel = np.array([m.setpoints["velocity"] for m in done])
    det = np.array([m.setpoints["detuning"] / 1e3 for m in done])
    inv = np.array([m.value("inversion") for m in done])
    box = run.box()
    if box is not None and "velocity" in box and "detuning" in box:
        low = np.array([box["velocity"][0], box["detuning"][0] / 1e3])
        high = np.array([box["velocity"][1], box["detuning"][1] / 1e3])
    else:
        low = np.array([vel.min(), det.min()])
        high = np.array([vel.max(), det.max()])
    # The view: the points, the chosen and the true best, with a margin; the box only where
    # it is near them (a wide box would crowd every point into its middle).
    low_all = np.array([vel.min(), det.min()])
    high_all = np.array([vel.max(), det.max()])
    chosen = run.chosen
    if chosen is not None and {"velocity", "detuning"} <= set(chosen):
        low_all = np.minimum(low_all, [chosen["velocity"], chosen["detuning"] / 1e3])
        high_all = np.maximum(high_all, [chosen["velocity"], chosen["detuning"] / 1e3])
    truth = run.truth
    true_best = None
    if truth is not None and isinstance(truth.get("best_setpoints"), Mapping):
        tb = read_setpoints(truth["best_setpoints"])
        if {"velocity", "detuning"} <= set(tb):
            true_best = (tb["velocity"], tb["detuning"] / 1e3)
            low_all = np.minimum(low_all, true_best)
            high_all = np.maximum(high_all, true_best)
    span = np.where(high_all > low_all, high_all - low_all, 1.0)
    low_all, high_all = low_all - 0.12 * span, high_all + 0.12 * span
    near = high - low
    clipped = bool(np.any(low < low_all - 0.3 * near) or np.any(high > high_all + 0.3 * near))
    if not clipped:
        low_all, high_all = np.minimum(low_all, low - 0.04 * near), np.maximum(high_all, high + 0.04 * near)
    vmin, vmax = float(np.min(inv)), float(np.max(inv))
    if vmax <= vmin:
        vmax = vmin + 1e-3
    strategy = str(run.stages[-1].get("strategy", "")) if run.stages else ""
    if strategy == "phase_lock":
        model_note = ("no surface is drawn: the phase lock chose these points from its phase "
                      "curve and its absorption curve (see the phase-shift and absorption "
                      "figures), not from a model of the inversion over this plane")
    else:
        model_note = ("no surface is drawn: the model that chose these points is not in the "
                      "journal, and a surface fitted here would not be the one that decided")
    from matplotlib.lines import Line2D

    handles = []
    labels = list(dict.fromkeys(m.label for m in done))
    for label in labels:
        pick = np.array([m.label == label for m in done])
        mappable = ax.scatter(vel[pick], det[pick], c=inv[pick], cmap="viridis", vmin=vmin, vmax=vmax,
                   marker=marker_of(label), s=46 if label in SEARCH_LABELS else 60, edgecolors="white",
                   linewidths=0.8, gid=f"points-{label}", zorder=3)
        # Legend entries in grey: the marker tells the label, the colour is the inversion.
        handles.append(Line2D([], [], marker=marker_of(label), ls="none", color="0.45", mec="white",
                              ms=7, label=f"{label} ({int(pick.sum())})"))
    fig.colorbar(mappable, ax=ax, label="measured inversion (dimensionless)")
    offsets = ((6, -10), (6, 5), (-13, 5), (-13, -10))
    for k, (m, v, d) in enumerate(zip(done, vel, det, strict=True)):
        if m.label in SEARCH_LABELS:
            # Numbers beside their point on a pale box, under the chosen star.
            ax.annotate(str(m.point), (v, d), textcoords="offset points", xytext=offsets[k % 4],
                        fontsize=7.5, color="black", zorder=4,
                        bbox={"boxstyle": "round,pad=0.1", "fc": "white", "ec": "none",
                              "alpha": 0.7})
    if box is not None and "velocity" in box and "detuning" in box:
        from matplotlib.patches import Rectangle

        handles.append(ax.add_patch(Rectangle(
            (low[0], low[1]), high[0] - low[0], high[1] - low[1], fill=False, ls="--", lw=1.2,
            ec="black", label="search box", gid="box")))
    if chosen is not None and {"velocity", "detuning"} <= set(chosen):
        handles += ax.plot(chosen["velocity"], chosen["detuning"] / 1e3, marker="*", ms=18,
                           mfc="none", mec="red", mew=1.8, ls="none", gid="chosen", zorder=5,
                           label="chosen" if run.chosen_is_verified
                           else "chosen (not yet verified)")
    outside = ""
    if true_best is not None:
        handles += ax.plot(*true_best, marker="P", ms=12, color="black", mfc="white", ls="none",
                           gid="true-best", zorder=5, label="true best (simulated)")
        if box is not None and not all(
                box[k][0] <= v <= box[k][1] for k, v in
                (("velocity", true_best[0]), ("detuning", true_best[1] * 1e3)) if k in box):
            outside = " The simulator's true best lies outside this stage's box."
    ax.set_xlim(low_all[0], high_all[0])
    ax.set_ylim(low_all[1], high_all[1])
    ax.set_xlabel("velocity set-point (m/s)")
    ax.set_ylabel("detuning set-point (kHz)")
    fig.legend(handles=handles, fontsize=7, loc="outside lower center", ncol=min(len(handles), 6))
    set_title(fig, run, "measured points over the box")
    caption = (f"Every measured point over the (velocity, detuning) plane, coloured by its "
               f"measured inversion; search points numbered in the order measured; dashed: the "
               f"stage's search box; star: the chosen set-points. {model_note[0].upper()}"
               f"{model_note[1:]}.{outside}"
               + (f" The view is zoomed on the points; the box spans "
                  f"{low[0]:.1f} to {high[0]:.1f} m/s and {low[1]:+.1f} to {high[1]:+.1f} kHz."
                  if clipped else ""))
    return fig, caption


