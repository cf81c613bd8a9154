"""Figure: the photon phase shift against detuning, with the phase lock's own model.

The phase lock (:mod:`autotune.analysis.guided`) chooses the detuning where its fitted phase curve
crosses its estimate of the phase at the inversion's peak; both are journaled in the
``stop_search`` decision (``learned``: ``lock_fit``, ``phase_at_peak_rad``). This figure draws
exactly those: a reader sees the crossing that made the choice.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from autotune.analysis.lock_fit import wrap_phase
from autotune.errors import ValueRefused
from autotune.report.figures.base import finish_against_detuning, new_figure
from autotune.report.model import Run, number_at

#: Two-sided 95 % point of the standard normal (scipy.stats.norm.ppf(0.975)).
Z95 = 1.959963984540054


class LockCurve:
    """The lock's fitted phase curve from its journaled ``lock_fit`` (see
    :meth:`autotune.analysis.guided.PhaseLockSearch.state`): mean and standard error in rad."""

    def __init__(self, fit: Mapping[str, Any]) -> None:
        self.centre_hz = float(fit["centre_hz"])
        self.step_hz = float(fit["step_hz"])
        self.t_ref = None if fit.get("t_ref_s") is None else float(fit["t_ref_s"])
        self.theta = np.asarray(fit["coefficients"], dtype=float)
        self.cov = np.asarray(fit["covariance"], dtype=float)
        self.velocity = float(fit["velocity_m_per_s"])
        if self.theta.shape != (4,) or self.cov.shape != (4, 4):
            raise ValueRefused("lock_fit needs 4 coefficients and a 4 x 4 covariance")

    def _design(self, detuning_hz: np.ndarray, clock_s: float | None) -> np.ndarray:
        d = np.asarray(detuning_hz, dtype=float) - self.centre_hz
        tau = 0.0 if (self.t_ref is None or clock_s is None) else clock_s - self.t_ref
        return np.stack([np.ones_like(d), d, (d / self.step_hz) ** 3, np.full_like(d, tau)], axis=1)

    def phase(self, detuning_hz: np.ndarray, clock_s: float | None) -> tuple[np.ndarray, np.ndarray]:
        """Mean phase (rad) and its standard error at the detunings and the rig clock."""
        x = self._design(detuning_hz, clock_s)
        var = np.einsum("ij,jk,ik->i", x, self.cov, x)
        return x @ self.theta, np.sqrt(np.clip(var, 0.0, None))


def lock_curve(run: Run) -> LockCurve | None:
    """The run's journaled lock curve, or None (not journaled, or unreadable)."""
    learned = run.learned or {}
    fit = learned.get("lock_fit")
    if not isinstance(fit, Mapping):
        return None
    try:
        return LockCurve(fit)
    except (KeyError, TypeError, ValueError):
        return None


def figure_phase_shift(run: Run) -> tuple[Any, str] | None:
    """Figure: photon phase shift (units of pi) against detuning, with the lock's model.

    Points: every identified estimate's phase shift with one standard error (coloured by the
    velocity set-point when it varies). With the lock's journaled model: its curve at the rig
    time of the verification (solid) with its 95 % band, the same curve at the time of its last
    lock point when the fitted drift moved it visibly (dotted), the phase at the peak with its
    95 % band (horizontal), and the chosen detuning (vertical). Returns ``(figure, caption)``,
    or None with fewer than two identified estimates.
    """
    done = [m for m in run.estimated if "detuning" in m.setpoints
            and m.estimate.get("identified", True) and math.isfinite(m.value("phase_shift"))]
    if len(done) < 2:
        return None
    learned = run.learned or {}
    star = number_at(learned, "phase_at_peak_rad")
    star_sd = number_at(learned, "phase_at_peak_stderr_rad")
    centre = star if math.isfinite(star) else math.pi
    fig = new_figure(7.0, 4.8)
    ax = fig.add_subplot()
    x = np.array([m.setpoints["detuning"] / 1e3 for m in done])
    # Unwrapped around the phase at the peak, as the lock reads them.
    y = (centre + wrap_phase(np.array([m.value("phase_shift") for m in done]) - centre)) / math.pi
    e = np.array([m.value("phase_shift_stderr") / math.pi for m in done])
    ax.errorbar(x, y, yerr=np.where(np.isfinite(e), e, 0.0), fmt="none", ecolor="0.5",
                capsize=2, lw=0.8, zorder=2)
    vel = [m.setpoints.get("velocity", math.nan) for m in done]
    if all(math.isfinite(v) for v in vel) and np.ptp(vel) > 0:
        sc = ax.scatter(x, y, c=vel, cmap="plasma", s=26, zorder=3, gid="phase-shift")
        fig.colorbar(sc, ax=ax, label="velocity set-point (m/s)")
    else:
        ax.scatter(x, y, color="tab:blue", s=26, zorder=3, gid="phase-shift")
    notes = []
    curve = lock_curve(run)
    final = run.final_measurement()
    chosen = run.chosen
    verify_clock = final.clock_s if final is not None else None
    if curve is not None:
        span = [x.min(), x.max()]
        if chosen is not None and "detuning" in chosen:
            span += [chosen["detuning"] / 1e3]
        low, high = min(span), max(span)
        pad = max(0.08 * (high - low), 1.0)
        grid = np.linspace(low - pad, high + pad, 241)
        mean, sd = curve.phase(grid * 1e3, verify_clock)
        ax.plot(grid, mean / math.pi, "-", color="tab:green", lw=1.6, zorder=4, gid="lock-model",
                label="the lock's model at the verification")
        ax.fill_between(grid, (mean - Z95 * sd) / math.pi, (mean + Z95 * sd) / math.pi,
                        color="tab:green", alpha=0.18, lw=0, zorder=1, gid="lock-band",
                        label="its 95 % band")
        if curve.t_ref is not None and verify_clock is not None:
            then, _ = curve.phase(grid * 1e3, curve.t_ref)
            if np.max(np.abs(then - mean)) > 0.01 * math.pi:
                ax.plot(grid, then / math.pi, ":", color="tab:green", lw=1.2, zorder=4,
                        gid="lock-model-then", label="the same at its last lock point")
                drift = curve.theta[3] * (verify_clock - curve.t_ref)
                notes.append(f"the fitted drift of the phase ({curve.theta[3] / math.pi * 3600:+.2f} π "
                             f"per hour) moved the curve by {drift / math.pi:+.3f} π between the "
                             "last lock point and the verification")
    if math.isfinite(star):
        ax.axhline(star / math.pi, color="black", lw=1.0, ls="--", zorder=4, gid="phase-at-peak",
                   label=f"phase at the peak {star / math.pi:.3f} π"
                   + (f" ± {Z95 * star_sd / math.pi:.3f} π" if math.isfinite(star_sd) else ""))
        if math.isfinite(star_sd):
            ax.axhspan((star - Z95 * star_sd) / math.pi, (star + Z95 * star_sd) / math.pi,
                       color="0.5", alpha=0.12, lw=0, zorder=0)
    else:
        ax.axhline(1.0, color="black", lw=1.0, ls=":", label="π (the 2π condition)")
    if final is not None and final in done:
        k = done.index(final)
        ax.plot(x[k], y[k], marker="*", ms=16, mfc="none", mec="red", mew=1.6, ls="none",
                gid="chosen", zorder=5,
                label=f"{final.name}: {y[k]:.3f} π ± {e[k]:.3f} π")
    finish_against_detuning(fig, ax, run, chosen, ylabel="photon phase shift (π rad)",
                             title="photon phase shift and the lock's model",
                             gid="chosen-detuning", label="chosen detuning", legend_size=7)
    if curve is not None:
        model = ("Green: the phase lock's own fitted curve (phase = α + s d + c (d/h)³ + β t, "
                 "a Bayesian linear fit journaled with its covariance when the lock stopped) and "
                 "its 95 % band. The lock chose the detuning where that curve, at the time of the "
                 "verification, crosses its estimate of the phase at the inversion's peak "
                 "(dashed, learned from how the inversion falls on either side, with its 95 % "
                 "band); the peak's phase is near π, not exactly π, on a real rig.")
    else:
        model = "No lock model was journaled for this run (another strategy, or not stopped yet)."
    caption = ("The angle between the one-photon and the empty fringe, in units of π, with one "
               "standard error, at every measured point (coloured by velocity when it varies). "
               "At the 2π condition it is near π; detuning turns it one way or the other "
               f"(docs/physics.md §5b). {model}"
               + (" Note: " + "; ".join(notes) + "." if notes else ""))
    return fig, caption
