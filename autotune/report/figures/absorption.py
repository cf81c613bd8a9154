"""Figure: absorption and inversion against velocity, with the lock's absorption model.

The phase lock (:mod:`autotune.analysis.guided`) learns the velocity from the absorption
P_e(one photon), which vanishes at the exact 2π rotation (docs/physics.md §5b): a weighted quadratic
in ``x = v_ref / v - 1`` journaled with its covariance in the ``stop_search`` decision
(``learned``: ``absorption_fit``, ``velocity_least_absorption_m_per_s`` and its standard error).
This figure draws that model, the points, the velocity it gives and the velocity chosen, and
below it the inversion measured at each velocity.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from autotune.report.figures.base import errorbar, marker_of, new_figure, set_title
from autotune.report.figures.phase import Z95
from autotune.report.model import Run, level_label, number_at


def _absorption_model(learned: Mapping[str, Any]) -> tuple[float, np.ndarray, np.ndarray] | None:
    fit = learned.get("absorption_fit")
    if not isinstance(fit, Mapping):
        return None
    try:
        ref = float(fit["velocity_ref_m_per_s"])
        coef = np.asarray(fit["coefficients"], dtype=float)
        cov = np.asarray(fit["covariance"], dtype=float)
    except (KeyError, TypeError, ValueError):
        return None
    if coef.shape != (3,) or cov.shape != (3, 3) or not ref > 0:
        return None
    return ref, coef, cov


def figure_absorption(run: Run) -> tuple[Any, str] | None:
    """Figure: absorption (top) and inversion (bottom) against the velocity set-point.

    Top: every estimate's absorption with its interval at the run's confidence; with the lock's
    journaled model, its quadratic and 95 % band, the velocity of least absorption with its
    95 % interval (shaded) and the chosen velocity (dashed). Bottom: the inversions measured,
    with their intervals. Returns ``(figure, caption)``, or None unless estimates at two
    velocities or more have an absorption.
    """
    done = [m for m in run.estimated if "velocity" in m.setpoints
            and math.isfinite(m.value("absorption"))]
    if len({round(m.setpoints["velocity"], 3) for m in done}) < 2:
        return None
    fig = new_figure(7.0, 6.0)
    ax_abs, ax_inv = fig.subplots(2, 1, sharex=True, height_ratios=[3, 2])
    level = level_label(run.confidence)
    for label in dict.fromkeys(m.label for m in done):
        pick = [m for m in done if m.label == label]
        v = np.array([m.setpoints["velocity"] for m in pick])
        p = np.array([m.value("absorption") for m in pick])
        lo = np.array([m.value("absorption_low") for m in pick])
        hi = np.array([m.value("absorption_high") for m in pick])
        err = np.vstack([np.where(np.isfinite(lo), p - lo, 0.0), np.where(np.isfinite(hi), hi - p, 0.0)])
        errorbar(ax_abs, v, p, yerr=np.clip(err, 0.0, None), fmt=marker_of(label), ms=5, capsize=2,
                  lw=0.8, label=f"{label} ({len(pick)})", gid=f"absorption-{label}")
        inv = np.array([m.value("inversion") for m in pick])
        ilo = np.array([m.value("inversion_low") for m in pick])
        ihi = np.array([m.value("inversion_high") for m in pick])
        ierr = np.vstack([np.where(np.isfinite(ilo), inv - ilo, 0.0),
                          np.where(np.isfinite(ihi), ihi - inv, 0.0)])
        errorbar(ax_inv, v, inv, yerr=np.clip(ierr, 0.0, None), fmt=marker_of(label), ms=5,
                  capsize=2, lw=0.8, gid=f"inversion-{label}")
    learned = run.learned or {}
    model = _absorption_model(learned)
    velocities = [m.setpoints["velocity"] for m in done]
    chosen = run.chosen
    span = velocities + ([chosen["velocity"]] if chosen and "velocity" in chosen else [])
    low, high = min(span), max(span)
    pad = max(0.05 * (high - low), 1.0)
    grid = np.linspace(low - pad, high + pad, 241)
    notes = []
    if model is not None:
        ref, coef, cov = model
        x = ref / grid - 1.0
        design = np.stack([np.ones_like(x), x, x * x], axis=1)
        mean = design @ coef
        sd = np.sqrt(np.clip(np.einsum("ij,jk,ik->i", design, cov, design), 0.0, None))
        ax_abs.plot(grid, mean, "-", color="tab:green", lw=1.6, gid="absorption-model",
                    label="the lock's quadratic in v_ref/v − 1")
        ax_abs.fill_between(grid, mean - Z95 * sd, mean + Z95 * sd, color="tab:green", alpha=0.18,
                            lw=0, gid="absorption-band", label="its 95 % band")
    best = number_at(learned, "velocity_least_absorption_m_per_s")
    best_sd = number_at(learned, "velocity_least_absorption_stderr_m_per_s")
    if math.isfinite(best):
        text = f"least absorption {best:.1f} m/s"
        if math.isfinite(best_sd):
            text += f" ± {Z95 * best_sd:.1f} m/s (95 %)"
            for ax in (ax_abs, ax_inv):
                ax.axvspan(best - Z95 * best_sd, best + Z95 * best_sd, color="tab:green",
                           alpha=0.10, lw=0, zorder=0)
        ax_abs.axvline(best, color="tab:green", lw=1.0, ls=":", gid="least-absorption",
                       label=text)
        notes.append(text)
    elif learned:
        notes.append(f"no velocity of least absorption yet ({learned.get('velocity_note') or 'not bracketed'})")
    if chosen is not None and "velocity" in chosen:
        for ax in (ax_abs, ax_inv):
            ax.axvline(chosen["velocity"], color="red", lw=1.2, ls="--", gid="chosen-velocity",
                       label=f"chosen velocity {chosen['velocity']:.1f} m/s" if ax is ax_abs else None)
    ax_abs.set_ylabel("absorption $P_e$ (dimensionless)")
    ax_abs.set_ylim(bottom=min(0.0, ax_abs.get_ylim()[0]))
    ax_abs.grid(alpha=0.3)
    fig.legend(*ax_abs.get_legend_handles_labels(), fontsize=7, loc="outside lower center", ncol=3)
    ax_inv.set_ylabel("inversion (dimensionless)")
    ax_inv.set_xlabel("velocity set-point (m/s)")
    ax_inv.set_xlim(grid[0], grid[-1])  # an interval wider than the points is cut, not drawn out
    ax_inv.grid(alpha=0.3)
    set_title(fig, run, "absorption and inversion against velocity")
    how = ("Green: the phase lock's own weighted quadratic of the absorption in x = v_ref/v − 1 "
           "(journaled with its covariance when the lock stopped) with its 95 % band; its "
           "minimum is the velocity of the 2π rotation, shaded with its 95 % interval."
           if model is not None else "No absorption model was journaled for this run.")
    caption = (f"Top: the absorption P_e of the one-photon field at each velocity set-point, with "
               f"its {level} interval; it vanishes at the exact 2π rotation and grows on either "
               f"side (docs/physics.md §5b). {how} Red dashed: the chosen velocity. Bottom: the "
               f"inversion measured at the same points, with its {level} interval (points off "
               "the detuning peak sit lower)." + (" " + "; ".join(notes).capitalize() + "."
                                                   if notes else ""))
    return fig, caption
