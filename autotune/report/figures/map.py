"""Figure: the measured points over the (velocity, detuning) box."""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from typing import Any

import numpy as np

from autotune.report.figures._base import _marker, _new_figure, _title
from autotune.report.model import SEARCH_LABELS, Run, _setpoints


def _gp_surface(xy: np.ndarray, y: np.ndarray, stderr: np.ndarray,
                low: np.ndarray, high: np.ndarray, grid: int = 60
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Posterior mean of a Gaussian process through the points, on a grid over [low, high]."""
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern

    span = high - low
    unit = (xy - low) / span
    mean = float(np.mean(y))
    noise = np.clip(np.where(np.isfinite(stderr), stderr, 0.05), 1e-3, None) ** 2
    kernel = ConstantKernel(max(float(np.var(y)), 1e-4), (1e-5, 1.0)) * \
        Matern(length_scale=[0.3, 0.3], length_scale_bounds=(0.02, 10.0), nu=2.5)
    model = GaussianProcessRegressor(kernel, alpha=noise, n_restarts_optimizer=2,
                                     random_state=0)
    with warnings.catch_warnings():
        # Hyper-parameters at a bound are fine for a display surface.
        warnings.simplefilter("ignore", ConvergenceWarning)
        try:
            model.fit(unit, y - mean)
        except (ValueError, np.linalg.LinAlgError):
            return None
    gx = np.linspace(low[0], high[0], grid)
    gy = np.linspace(low[1], high[1], grid)
    mx, my = np.meshgrid(gx, gy)
    pts = (np.column_stack([mx.ravel(), my.ravel()]) - low) / span
    return mx, my, model.predict(pts).reshape(mx.shape) + mean


def figure_map(run: Run) -> tuple[Any, str] | None:
    """Figure 3: the measured points over the (velocity, detuning) box, over a model surface.

    Search points are numbered in order; other labels get their own markers. The surface is a
    Gaussian-process regression of every measured inversion (display only). Returns
    ``(figure, caption)``, or None with fewer than two measurements that have both set-points
    (the header gives a single point).
    """
    done = [m for m in run.estimated if {"velocity", "detuning"} <= set(m.setpoints)
            and math.isfinite(m.value("inversion"))]
    if len(done) < 2:
        return None
    fig = _new_figure(7.5, 5.2)
    ax = fig.add_subplot()
    vel = np.array([m.setpoints["velocity"] for m in done])
    det = np.array([m.setpoints["detuning"] / 1e3 for m in done])
    inv = np.array([m.value("inversion") for m in done])
    err = np.array([m.value("inversion_stderr") for m in done])
    box = run.box()
    if box is not None and "velocity" in box and "detuning" in box:
        low = np.array([box["velocity"][0], box["detuning"][0] / 1e3])
        high = np.array([box["velocity"][1], box["detuning"][1] / 1e3])
    else:
        low = np.array([vel.min(), det.min()])
        high = np.array([vel.max(), det.max()])
    low_all = np.minimum(low, [vel.min(), det.min()])
    high_all = np.maximum(high, [vel.max(), det.max()])
    truth = run.truth
    true_best = None
    if truth is not None and isinstance(truth.get("best_setpoints"), Mapping):
        tb = _setpoints(truth["best_setpoints"])
        if {"velocity", "detuning"} <= set(tb):
            true_best = (tb["velocity"], tb["detuning"] / 1e3)
            low_all = np.minimum(low_all, true_best)
            high_all = np.maximum(high_all, true_best)
    span = np.where(high_all > low_all, high_all - low_all, 1.0)
    low_all, high_all = low_all - 0.04 * span, high_all + 0.04 * span
    vmin, vmax = float(np.min(inv)), float(np.max(inv))
    model_note = "too few points for a model surface"
    xy = np.column_stack([vel, det])
    if len(done) >= 3 and np.all(np.ptp(xy, axis=0) > 0) and np.all(high > low):
        # Over the box (or the points' extent) only: outside it the model only extrapolates.
        surface = _gp_surface(xy, inv, err, low, high)
        if surface is not None:
            mx, my, mz = surface
            vmin, vmax = min(vmin, float(mz.min())), max(vmax, float(mz.max()))
            if vmax <= vmin:
                vmax = vmin + 1e-3
            from matplotlib.ticker import MaxNLocator

            levels = MaxNLocator(14).tick_values(vmin, vmax)
            vmin, vmax = float(levels[0]), float(levels[-1])
            cs = ax.contourf(mx, my, mz, levels=levels, cmap="viridis", alpha=0.55)
            fig.colorbar(cs, ax=ax, label="inversion: model and points (dimensionless)")
            model_note = ("background: Gaussian-process regression of the measured inversions "
                          "(Matérn ν = 5/2 kernel, each point's own standard error as its noise, "
                          "scikit-learn) over the box, for display only; it is not the search's "
                          "surrogate")
    if vmax <= vmin:
        vmax = vmin + 1e-3
    from matplotlib.lines import Line2D

    handles = []
    labels = list(dict.fromkeys(m.label for m in done))
    for label in labels:
        pick = np.array([m.label == label for m in done])
        ax.scatter(vel[pick], det[pick], c=inv[pick], cmap="viridis", vmin=vmin, vmax=vmax,
                   marker=_marker(label), s=46 if label in SEARCH_LABELS else 60, edgecolors="white",
                   linewidths=0.8, gid=f"points-{label}", zorder=3)
        # Legend entries in grey: the marker tells the label, the colour is the inversion.
        handles.append(Line2D([], [], marker=_marker(label), ls="none", color="0.45", mec="white",
                              ms=7, label=f"{label} ({int(pick.sum())})"))
    for m, v, d in zip(done, vel, det, strict=True):
        if m.label in SEARCH_LABELS:
            ax.annotate(str(m.point), (v, d), textcoords="offset points", xytext=(4, 3),
                        fontsize=6.5, color="black", zorder=4)
    if box is not None and "velocity" in box and "detuning" in box:
        from matplotlib.patches import Rectangle

        handles.append(ax.add_patch(Rectangle(
            (low[0], low[1]), high[0] - low[0], high[1] - low[1], fill=False, ls="--", lw=1.2,
            ec="black", label="search box", gid="box")))
    chosen = run.chosen
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
    _title(fig, run, "measured points over the box")
    caption = (f"Every measured point over the (velocity, detuning) plane, coloured by its "
               f"measured inversion; search points numbered in the order measured; dashed: the "
               f"stage's search box; star: the chosen set-points. {model_note[0].upper()}"
               f"{model_note[1:]}.{outside}")
    return fig, caption


