"""The phase lock's absorption signal: the absorption fit along velocity, the inversion curve and
the velocity plan (pure, no I/O).

Moved out of :mod:`autotune.analysis.guided` (the physics is described there);
:class:`AbsorptionSignal` is a part of :class:`~autotune.analysis.guided.PhaseLockSearch`, reading
its state.
"""

from __future__ import annotations

import math

import numpy as np

from autotune.analysis.fringe import shared_fringe_covariance
from autotune.analysis.lock_fit import mixture_phase_error, mixture_phase_gain, solve_gaussian
from autotune.analysis.next_point import SAME_VELOCITY
from autotune.analysis.velocity_model import InversionCurve, AbsorptionFit, fit_inversion_curve
from autotune.analysis.guided_phase import MIN_INVERSION_SCALE, Observation

__all__ = ["AbsorptionSignal"]

# Two velocities closer than this (relative) are one velocity group of the absorption fit.
_SAME_VELOCITY = SAME_VELOCITY


class AbsorptionSignal:
    """The absorption signal of :class:`~autotune.analysis.guided.PhaseLockSearch` (a part of it, not used alone)."""

    # -- the absorption signal --------------------------------------------------------------

    def _anchor(self) -> Observation | None:
        points = self._in_range()
        return points[0] if points else None

    def _absorption_points(self) -> list[Observation]:
        window = self.settings.absorption_phase_window_rad
        star = self._phase_star()[0]
        faint = self._faint_velocity_phases()
        return [o for o in self._obs
                if (self._range_note(o.result) is None and abs(self._unwrapped(o) - star) <= window)
                or (id(o) in faint and abs(faint[id(o)][0] - star) <= window)]

    def _faint_velocity_phases(self) -> dict[int, tuple[float, float]]:
        """Velocity steps of a poor source whose own phase was too faint to steer (below
        ``min_contrast_ratio`` and too noisy to keep off the wrap), by ``id``: the lock's
        predicted (measured-scale) phase there and its standard deviation.

        The absorption and the inversion of such a step are measured as well as any other's;
        only its phase is not, and the lock, established at the other velocities, predicts it
        (with the model error of the velocity difference, ``phase_velocity_error_rad``). Only
        for a poor source (:meth:`_mixture_low` above 0; a good source's faint point is a
        rotation far from 2 pi) and in a calibration.
        """
        return self._cached("faint_velocity", self._compute_faint_velocity_phases)

    def _compute_faint_velocity_phases(self) -> dict[int, tuple[float, float]]:
        if self.prior is not None or self._mixture_low() <= 0.0:
            return {}
        out: dict[int, tuple[float, float]] = {}
        for o in self._obs:
            note = self._range_note(o.result) if o.purpose == "velocity" else None
            if note is None or not note.startswith("one-photon/empty contrast"):
                continue
            fit = self._lock_fit(o.velocity)
            if fit is None or not fit.slope_known():
                continue
            phase, variance = fit.phase(o.detuning, o.result.clock_s)
            out[id(o)] = (phase, math.sqrt(variance))
        return out

    def _phase_for_absorption(self, o: Observation) -> tuple[float, float]:
        """A point's (unwrapped) phase and its standard deviation: measured, or predicted by
        the lock for a faint velocity step."""
        faint = self._faint_velocity_phases()
        if id(o) in faint:
            return faint[id(o)]
        return self._unwrapped(o), o.result.phase_shift_stderr

    def _absorption_fit(self) -> AbsorptionFit | None:
        return self._cached("absorption", self._compute_absorption_fit)

    def _absorption_prior(self, velocity_ref: float) -> tuple[np.ndarray, np.ndarray] | None:
        if self.prior is None:
            return None
        p = self.prior
        # P = P_min + k (v*/v - 1)^2 in x = v_ref/v - 1: a2 = k / (1 + x*)^2, a1 = -2 a2 x*.
        x_star = velocity_ref / p.velocity_m_per_s - 1.0
        a2 = p.absorption_curvature / (1.0 + x_star) ** 2
        mean = np.array([p.absorption_min + a2 * x_star**2, -2.0 * a2 * x_star, a2])
        # The vertex is known to its stored error and may have moved by the tolerance; the
        # curvature to its error and 30 %.
        x_sd = math.hypot(p.velocity_stderr_m_per_s / p.velocity_m_per_s,
                          self.settings.prior_velocity_tolerance_fraction)
        a2_sd = math.hypot(p.absorption_curvature_stderr, 0.3 * p.absorption_curvature)
        sd = np.array([math.hypot(p.absorption_min_stderr, a2 * x_sd**2), 2.0 * a2 * x_sd, max(a2_sd, 1e-6)])
        return mean, np.diag(1.0 / sd**2)

    def _compute_absorption_fit(self) -> AbsorptionFit | None:
        anchor = self._anchor()
        if anchor is None:
            return None
        velocity_ref = self.prior.velocity_m_per_s if self.prior is not None else anchor.velocity
        points = self._absorption_points()
        xs = np.array([velocity_ref / o.velocity - 1.0 for o in points])
        groups: list[float] = []
        for x in sorted(xs.tolist()):
            if not groups or x - groups[-1] > _SAME_VELOCITY:
                groups.append(x)
        prior = self._absorption_prior(velocity_ref)
        if prior is None and len(groups) < 3:
            return AbsorptionFit(velocity_ref, np.zeros(3), np.eye(3), tuple(groups), False) if points else None
        values = np.array([o.result.absorption for o in points])
        variances = np.maximum(np.array([o.result.absorption_stderr for o in points]) ** 2, 1e-8)
        design = np.stack([np.ones(len(points)), xs, xs**2], axis=1) if points else np.zeros((0, 3))
        if prior is None:
            mean, precision = np.zeros(3), np.diag([1e-6, 1e-6, 1e-6])
        else:
            mean, precision = prior
        coef, cov = solve_gaussian(design, values, variances, mean, precision)
        return AbsorptionFit(velocity_ref, coef, cov, tuple(groups), prior is not None)

    def _absorption_ready(self, fit: AbsorptionFit | None) -> bool:
        return fit is not None and (fit.from_prior or len(fit.x_groups) >= 3)

    def _velocity_curve(self) -> InversionCurve | None:
        """The inversion along velocity (a calibration's; None before three velocities)."""
        return self._cached("velocity_curve", self._compute_velocity_curve)

    def _compute_velocity_curve(self) -> InversionCurve | None:
        fit = self._absorption_fit()
        if self.prior is not None or not self._absorption_ready(fit):
            return None
        # The search's own points: a verification measures the inversion at one velocity at
        # its own precision and moment; it judges the choice and does not move the model.
        points = [o for o in self._absorption_points() if o.purpose not in ("verify", "correct")]
        star = self._phase_star()[0]
        # The source's empty fraction at its cautious end (lock_fit.mixture_phase_error).
        empty = self._mixture_low()
        xs, values, variances, shared = [], [], [], []
        for o in points:
            # The inversion at the peak's phase: a phase error eps costs a factor cos(eps / 2).
            phase, phase_sd = self._phase_for_absorption(o)
            measured = phase - star
            half = 0.5 * float(mixture_phase_error(measured, empty))
            factor = max(math.cos(half), 0.5)
            value = o.result.inversion / factor
            # d eps / d psi of the mixture law: the measured phase's noise moves eps less.
            gain = mixture_phase_gain(measured, empty)
            xs.append(fit.x_of(o.velocity))
            values.append(value)
            variances.append((o.result.inversion_stderr / factor) ** 2
                             + (value * 0.5 * math.tan(half) * gain * phase_sd) ** 2)
            # The inversion and the empty contrast are read from the same empty fringe.
            shared.append(shared_fringe_covariance(
                o.result.contrast_empty, o.result.contrast_empty_stderr,
                o.result.contrast_one_photon, o.result.phase_shift) / factor)
        return fit_inversion_curve(
            xs, values, variances, [o.result.absorption for o in points],
            [o.result.absorption_stderr**2 for o in points],
            [o.result.contrast_empty for o in points],
            [o.result.contrast_empty_stderr**2 for o in points],
            fit.coef, fit.cov, self._inversion_scale(), fit.velocity_ref, fit.x_groups,
            inversion_contrast_covs=shared)

    def _inversion_scale(self) -> float:
        points = self._absorption_points() or self._in_range()
        if not points:
            return 1.0
        values = np.array([o.result.inversion for o in points])
        weights = 1.0 / np.maximum(np.array([o.result.inversion_stderr for o in points]) ** 2, 1e-8)
        return max(float((values * weights).sum() / weights.sum()), MIN_INVERSION_SCALE)

    def _box_x(self, fit: AbsorptionFit) -> tuple[float, float]:
        low, high = self._velocity_box
        return fit.x_of(high), fit.x_of(low)
