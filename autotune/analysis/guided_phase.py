"""The phase lock's phase signal: the phase observations in range, the detuning lock's fit and the
phase at the peak (pure, no I/O).

Moved out of :mod:`autotune.analysis.guided` (the physics is described there);
:class:`PhaseSignal` is a part of :class:`~autotune.analysis.guided.PhaseLockSearch`, reading its
state (``space``, ``settings``, ``prior``, ``_obs``, ``_cache``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from autotune.analysis.lock_fit import (
    LockFit,
    log_evidence,
    mixture_phase_error,
    solve_gaussian,
    wrap_phase,
    phase_signal_note,
)
from autotune.analysis.next_point import SAME_VELOCITY
from autotune.analysis.search import PointResult

__all__ = ["PhaseSignal", "Observation", "MIN_INVERSION_SCALE"]

_TWO_PI = 2.0 * math.pi
# Two velocities closer than this (relative) are one velocity group of the absorption fit.
_SAME_VELOCITY = SAME_VELOCITY
# The drift prior may widen by this factor when the data's marginal likelihood prefers it.
_DRIFT_WIDENING = 4.0
# Grid points of the posterior over the phase at the peak.
_PHASE_GRID = 241
# Largest one-photon source's empty fraction q = p0 / p1 used (0.9: a one-photon probability of
# 0.53; nearer 0.5 the mixture's phase is a step, not a lock signal), and the normal quantile of
# the cautious ends of its estimate (one-sided 95 %).
_MAX_MIXTURE = 0.9
_CAUTIOUS_Z = 1.645
# Log marginal-likelihood margin by which the pure photon's law must beat the mixture's for the
# lock to drop the mixture (2: a factor e^2 ~ 7, "positive" evidence on Kass and Raftery's scale,
# J. Am. Stat. Assoc. 90, 773 (1995)).
_LAW_EVIDENCE = 2.0
# Smallest inversion scale used as the denominator of the velocity term.
MIN_INVERSION_SCALE = 0.05


@dataclass(frozen=True)
class Observation:
    """One result told to the phase lock: where (m/s, Hz), what was measured, and why."""

    velocity: float
    detuning: float
    result: PointResult
    purpose: str


class PhaseSignal:
    """The phase signal of :class:`~autotune.analysis.guided.PhaseLockSearch` (a part of it, not used alone)."""

    # -- the phase signal -------------------------------------------------------------------

    def _phase_error(self, result: PointResult, centre: float | None = None) -> float:
        centre = self._phase_star_prior[0] if centre is None else centre
        return float(wrap_phase(result.phase_shift - centre))

    def _range_note(self, result: PointResult) -> str | None:
        """None when the point's phase signal is usable, else why not."""
        return phase_signal_note(result, self.settings, self._phase_star_prior[0],
                                 wrap_sigmas=self.settings.phase_wrap_sigmas)

    def _in_range(self) -> list[Observation]:
        return self._cached("in_range", lambda: [o for o in self._obs if self._range_note(o.result) is None])

    def _unwrapped(self, obs: Observation) -> float:
        centre = self._phase_star_prior[0]
        return centre + self._phase_error(obs.result, centre)

    def _slope_prior(self) -> tuple[float, float] | None:
        if self.prior is None:
            return None
        s = self.prior.slope_rad_per_hz
        sd = math.hypot(self.prior.slope_stderr_rad_per_hz, self.settings.prior_slope_tolerance_fraction * s)
        return s, sd

    def _lock_fit(self, velocity: float) -> LockFit | None:
        return self._cached(("lock", round(velocity, 9)), lambda: self._compute_lock_fit(velocity))

    def _compute_lock_fit(self, velocity: float) -> LockFit | None:
        points = self._in_range()
        if not points:
            return None
        s_set = self.settings
        h = self.step_hz
        detunings = np.array([o.detuning for o in points])
        phases = np.array([self._unwrapped(o) for o in points])
        model = s_set.phase_velocity_error_rad * np.array([abs(o.velocity / velocity - 1.0) for o in points])
        variances = np.array([o.result.phase_shift_stderr for o in points]) ** 2 + model**2
        variances = np.maximum(variances, 1e-8)
        clocks = [o.result.clock_s for o in points]
        drift = s_set.drift_prior_hz_per_s > 0.0 and all(c is not None for c in clocks) and len(points) >= 2
        t_ref = max(clocks) if drift else None
        taus = np.array([c - t_ref for c in clocks]) if drift else np.zeros(len(points))
        phase_star = self._phase_star_prior[0]
        slope_prior = self._slope_prior()
        wide_slope = math.pi / h
        cubic_prior_mean = 0.0 if self.prior is None else self.prior.cubic_rad_per_hz3 * h**3

        # Pass 1: a line through the point closest to the peak, for the scales of the priors.
        nearest = int(np.argmin(np.abs(phases - phase_star)))
        centre = float(detunings[nearest])
        design = np.stack([np.ones(len(points)), detunings - centre], axis=1)
        mean0 = np.array([phase_star, slope_prior[0] if slope_prior else 0.0])
        precision0 = np.diag([1.0 / (_TWO_PI**2), 1.0 / (slope_prior[1] if slope_prior else wide_slope) ** 2])
        theta, _ = solve_gaussian(design, phases, variances, mean0, precision0)
        slope_scale = abs(float(theta[1]))

        cubic_sd = s_set.phase_cubic_prior_fraction * slope_scale * h
        if self.prior is not None:
            cubic_sd = math.hypot(cubic_sd, self.prior.cubic_stderr_rad_per_hz3 * h**3)
        # The drift prior's width: the configured one, or four times it when the data's marginal
        # likelihood prefers that (a cavity drifting faster than assumed would otherwise be
        # explained away by a wrong slope).
        widths = (s_set.drift_prior_hz_per_s, _DRIFT_WIDENING * s_set.drift_prior_hz_per_s) if drift else (0.0,)
        fit = None
        for _ in range(3):
            d = detunings - centre
            design = np.stack([np.ones(len(points)), d, (d / h) ** 3, taus], axis=1)
            mean = np.array([phase_star, slope_prior[0] if slope_prior else 0.0, cubic_prior_mean, 0.0])
            best = None
            for width in widths:
                drift_sd = slope_scale * width
                prior_sd = np.array([_TWO_PI, slope_prior[1] if slope_prior else wide_slope,
                                     max(cubic_sd, 1e-12), max(drift_sd, 1e-15)])
                evidence = log_evidence(design, phases, variances, mean, prior_sd)
                if best is None or evidence > best[0] + 1e-9:
                    best = (evidence, prior_sd)
            theta, cov = solve_gaussian(design, phases, variances, mean, np.diag(1.0 / best[1] ** 2))
            fit = LockFit(velocity, centre, h, t_ref, theta, cov, len(points))
            if not fit.slope_known():
                break
            star, _, _ = fit.solve(phase_star, 0.0, t_ref, 4.0 * h)
            if abs(star - centre) < 1e-3 * h:
                break
            centre = star
        return fit

    def _phase_star(self) -> tuple[float, float]:
        """Posterior mean and standard deviation of the phase at the peak (rad)."""
        mean, sd, _ = self._phase_model()
        return mean, sd

    def _mixture_low(self) -> float:
        """The one-photon source's empty fraction ``q = p0 / p1`` the lock uses: the physics'
        estimate at its cautious end (:meth:`_compute_mixture_estimate`) unless the inversions
        reject its law against a pure photon's (:meth:`_compute_phase_model`), else 0."""
        return self._phase_model()[2]

    def _phase_model(self) -> tuple[float, float, float]:
        return self._cached("phase_star", self._compute_phase_model)

    def _compute_phase_model(self) -> tuple[float, float, float]:
        """The phase at the peak (mean, sd) and the empty fraction used.

        The inversions are fitted with the pure photon's law (``q = 0``) and with the
        mixture's at the estimated ``q`` (:meth:`_compute_phase_star`); the mixture's law is
        kept unless the data's marginal likelihood prefers the pure one by more than
        ``exp(_LAW_EVIDENCE)``: a contrast lowered by something other than an empty fraction
        (the phase then moves as a pure photon's) must not make the bound bolder.
        """
        q = self._compute_mixture_estimate()
        pure = self._compute_phase_star(0.0)
        if q <= 0.0:
            return pure[0], pure[1], 0.0
        mixed = self._compute_phase_star(q)
        if mixed[2] < pure[2] - _LAW_EVIDENCE:
            return pure[0], pure[1], 0.0
        return mixed[0], mixed[1], q

    def _compute_mixture_estimate(self) -> float:
        """``q`` from the one-photon contrast and the absorption near the peak (0 without such points).

        At the peak (``a_g(1) = -|a|``) a field ``p0 |0> + p1 |1>`` gives the one-photon fringe
        the amplitude ``p0 - p1 |a|`` against the empty fringe's 1 (docs/physics.md section 5b:
        the photon-number average of ``a_g(n)``; detection, Ramsey pulses and velocity
        dephasing scale both fringes alike), and the absorption ``P_e = p1 (1 - |a|^2) / 2``.
        With ``p0 + p1 = 1`` the contrast ratio ``r = p1 (1 + |a|) - 1`` and ``P_e`` give
        ``|a| = 1 - 2 P_e / (1 + r)`` and ``p1 = (1 + r) / (1 + |a|)``; the mixture's phase then
        follows ``q = p0 / (p1 |a|) = (|a| - r) / ((1 + r) |a|)``
        (:func:`~autotune.analysis.lock_fit.mixture_phase_error`). Thermal photons raise ``r``
        (the empty fringe loses contrast too) and ``P_e`` (their own absorption), and both
        lower ``q``: the estimate errs towards a pure photon, whose inversion falls fastest with
        the measured phase. Taken at the upper 95 % limits of the inverse-variance weighted
        ``r`` and ``P_e`` of the usable points within ``absorption_phase_window_rad`` of the
        peak (the cautious end again), at most ``_MAX_MIXTURE``.

        Only for a poor source: while that upper ratio reaches ``min_contrast_ratio`` (every
        point the fixed contrast gate would have taken), ``q`` is 0, the pure photon's law, as
        the lock was measured on such rigs; the law gains at most ``1 / (1 - q)^2 ~ 1.3`` there
        (``q ~ 0.14`` at ``p1 = 0.88``), against a velocity term that is not always as safe
        (a rig of the velocity-physics family stopped one point earlier with it, below its bound).
        """
        centre = self._phase_star_prior[0]
        window = self.settings.absorption_phase_window_rad
        near = [o.result for o in self._in_range()
                if abs(self._unwrapped(o) - centre) <= window and o.result.contrast_empty > 0.0]
        if not near:
            return 0.0

        def upper(values: np.ndarray, sds: np.ndarray) -> float:
            weights = 1.0 / np.maximum(sds, 1e-4) ** 2
            mean = float((weights * values).sum() / weights.sum())
            return mean + _CAUTIOUS_Z / math.sqrt(float(weights.sum()))

        ratios = np.array([r.contrast_one_photon / r.contrast_empty for r in near])
        ratio_sds = np.array([math.hypot(r.contrast_one_photon_stderr, ratio * r.contrast_empty_stderr)
                              / r.contrast_empty for r, ratio in zip(near, ratios)])
        r_up = min(max(upper(ratios, ratio_sds), 0.0), 1.0)
        if r_up >= self.settings.min_contrast_ratio:
            return 0.0
        absorption_up = max(upper(np.array([r.absorption for r in near]),
                                  np.array([r.absorption_stderr for r in near])), 0.0)
        amplitude = 1.0 - 2.0 * absorption_up / (1.0 + r_up)
        if amplitude <= r_up:
            return 0.0
        return float(min((amplitude - r_up) / ((1.0 + r_up) * amplitude), _MAX_MIXTURE))

    def _compute_phase_star(self, empty: float) -> tuple[float, float, float]:
        """The phase at the peak from a grid posterior: the inversions of each velocity group
        fall from the peak as ``cos(eps / 2)`` of the one-photon phase error ``eps`` behind the
        measured one (:func:`~autotune.analysis.lock_fit.mixture_phase_error` with the empty
        fraction ``empty``; a pure photon's ``eps`` is the measured error), the scale solved in
        closed form per grid value. Returns the mean, the sd and the log marginal likelihood
        (up to a constant shared by every ``empty``)."""
        centre, width = self._phase_star_prior
        points = self._in_range()
        groups: dict[int, list[Observation]] = {}
        for obs in points:
            key = int(round(math.log(obs.velocity) / _SAME_VELOCITY))
            groups.setdefault(key, []).append(obs)
        usable = [g for g in groups.values() if len(g) >= 2]
        if not usable:
            return centre, width, 0.0
        grid = centre + width * np.linspace(-4.0, 4.0, _PHASE_GRID)
        log_post = -0.5 * ((grid - centre) / width) ** 2
        for group in usable:
            phases = np.array([self._unwrapped(o) for o in group])
            inversions = np.array([o.result.inversion for o in group])
            scale0 = max(float(np.max(inversions)), MIN_INVERSION_SCALE)
            errors0 = phases - centre
            # The phase's own noise moves the cos law too (errors in the regressor).
            variances = (np.array([o.result.inversion_stderr for o in group]) ** 2
                         + (0.5 * scale0 * np.sin(0.5 * np.abs(errors0))) ** 2
                         * np.array([o.result.phase_shift_stderr for o in group]) ** 2)
            weights = 1.0 / np.maximum(variances, 1e-10)
            shape = np.cos(0.5 * mixture_phase_error(phases[None, :] - grid[:, None], empty))  # (grid, points)
            scale = (shape * weights * inversions).sum(axis=1) / np.maximum((shape**2 * weights).sum(axis=1), 1e-12)
            chi2 = ((inversions[None, :] - scale[:, None] * shape) ** 2 * weights).sum(axis=1)
            log_post = log_post - 0.5 * chi2
        top = float(log_post.max())
        post = np.exp(log_post - top)
        # The prior's normalisation on the grid is the same for every law.
        evidence = top + math.log(float(post.sum())) - math.log(float(np.exp(-0.5 * ((grid - centre) / width) ** 2).sum()))
        post /= post.sum()
        mean = float((grid * post).sum())
        sd = float(math.sqrt(max(((grid - mean) ** 2 * post).sum(), 1e-12)))
        return mean, sd, evidence
