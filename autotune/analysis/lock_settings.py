"""The phase lock's settings and what a calibration hands to the next retune (pure, no I/O).

:class:`LockSettings` holds every tunable number of :class:`autotune.analysis.guided.PhaseLockSearch`
(SI units, the unit in each name) with the reason for its default; :class:`LockPrior` is what a
calibration learned (the phase curve, the absorption curve, its velocity term), stored with the
last good set-points for the next retune. :mod:`autotune.analysis.guided` re-exports both; the physics
behind the numbers is in its notes.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from autotune.errors import ValueRefused
from autotune.schema import is_number

__all__ = ["LockSettings", "LockPrior", "is_number"]


# --------------------------------------------------------------------------------------------
# Settings
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LockSettings:
    """Settings of :class:`PhaseLockSearch`, SI units with the unit in every name.

    Attributes
    ----------
    target_shortfall : float
        Predicted relative shortfall below the best at which the search stops (0.01: the
        issue's 98 % goal with room for the drift until the verification ends).
    confidence : float
        Level of the upper bound compared with the target (0.95).
    still_good_shortfall : float
        A retune's check keeps the last good set-points when the upper bound of their
        shortfall is below this (0.02: twice the target, because a single check's excess
        absorption is noisy; a thermal step of 15 kHz costs ~10 %, far above it).
    phase_at_peak_rad : float
        Centre of the prior on the phase shift at the peak, rad (pi: the 2 pi rotation's sign
        flip, docs/physics.md section 1).
    phase_at_peak_prior_rad : float
        Width (standard deviation) of that prior, rad (0.02 pi: small, for a dispersive phase
        of level i or fringe imperfections; the inversions refine it).
    capture_phase_error_rad : float
        Largest phase error ``|phi - phi*|`` of a point the lock uses, rad (0.6 pi: well inside
        the wrap at pi; the phase error is a nearly linear discriminator within it).
    min_contrast_ratio : float
        Smallest one-photon / empty contrast ratio of a usable point (0.35: near a pi or 3 pi
        rotation ``|a|`` and the ratio fall towards the unrotated fraction). A point below it
        is still usable when its phase error and its own standard error satisfy
        ``|phi - phi*| + phase_wrap_sigmas sigma_phi <= pi`` (see below); and only below it
        near the peak does the lock read the inversion through a poor source's mixture law
        (:func:`autotune.analysis.lock_fit.mixture_phase_error`).
    phase_wrap_sigmas : float or None
        Standard errors of a point's measured phase that must separate its phase error from
        the wrap at pi for a point below ``min_contrast_ratio`` to steer the lock (3: the
        wrapped angle is then on the right side at 99.7 % for a normal error). A poor
        one-photon source (``p1`` near 0.6) leaves every point near the best at a contrast ratio
        of about ``2 p1 - 1`` with a phase that still moves, ``p1 / (2 p1 - 1)`` times faster
        with the true phase error (docs/physics.md section 5b); its standard error, measured at
        every point, says what it is worth. The night's checks use it too. None: the contrast
        ratio alone decides.
    bracket_step_hz : float or None
        Detuning step of the bracket and the scale of the lock's cubic term, Hz. None: the
        detuning box's width / 12. Pass ``coupling_hz / 5`` from the nominal coupling.
    max_lock_step_hz : float or None
        Largest move of a lock step from the nearest usable point, Hz (None: two bracket
        steps), so that a noisy early slope cannot throw the lock out of range.
    velocity_step_fraction : float
        Velocity step of the absorption fit, relative to the velocity (0.05).
    lock_shots_per_phase, velocity_shots_per_phase : int
        Shots per field and Ramsey phase of lock and velocity steps (500 each; see the module
        notes for the comparison behind the defaults).
    ramsey_phases : int
        Ramsey phases per fringe of the loop (converts shots per phase to shots per point).
    phase_cubic_prior_fraction : float
        Prior width of the lock's cubic term at one bracket step, as a fraction of the linear
        term there (0.15: the curve may bend by this much within one step).
    drift_prior_hz_per_s : float
        Width of the Gaussian prior (centred on 0) on the cavity's drift during a calibration,
        Hz/s; the prior on the phase drift is this times the fitted slope (3 Hz/s, 10.8 kHz
        per hour; 0 switches the drift term off).
    phase_velocity_error_rad : float
        Model error added to a point's phase per unit of relative velocity between the point
        and the velocity the lock is evaluated at, rad (1.0: a point 5 % away counts with an
        extra 0.05 rad).
    absorption_phase_window_rad : float
        Largest phase error of a point the absorption fit uses, rad (0.2 pi: absorption varies
        with the detuning too).
    lock_acquired_shortfall : float
        The detuning term's upper bound below which the lock counts as acquired and the
        velocity steps begin (0.03).
    slope_sign : int
        Known sign of the phase slope ``d phi / d delta`` (+1 or -1), or 0 (unknown: learned;
        the first bracket step then goes towards the box centre).
    prior_slope_tolerance_fraction : float
        Relative change of the slope a retune allows beyond the stored slope's standard error
        (0.1).
    prior_velocity_tolerance_fraction : float
        Relative move of the velocity of least absorption a retune allows beyond its stored
        standard error (0.01: a thermal step moves the cavity's frequency, not the selected
        velocity).
    fallback_initial_points : int
        Space-filling points of the Gaussian-process fallback's first design (6).
    step_phase_stderr_rad : float
        Standard error of the one-photon phase error ``eps`` a lock step is sized for, rad
        (0.15: the 1 % target allows a phase error of 0.4 rad, ``1 - cos(eps / 2) <= 0.01``, so
        a step's own noise keeps its 95 % range inside it). For a pure photon ``eps`` is the
        measured phase error; on a poor source read through the mixture's law the measured
        phase's noise moves ``eps`` by the law's gain, ``1 - q`` at the peak
        (:func:`autotune.analysis.lock_fit.mixture_phase_gain`), and the step takes ``(1 - q)^2``
        of the shots.
    step_absorption_stderr : float
        Absorption standard error a velocity step is sized for (0.005: half the excess
        absorption one velocity step of 5 % adds at a curvature of 4, ``4 x 0.05^2 = 0.01``).
    step_shots_range : (float, float)
        Lock and velocity steps take their configured shots until a point is measured, then the
        shots that give the standard errors above from the measured error per shot (which
        carries the one-photon contrast, the atom rate and the detection efficiency), within
        this range of multiples of the configured shots ((0.5, 4.0); (1, 1) keeps them fixed).
    posterior_draws : int
        Seeded posterior draws behind every upper bound (4000).
    """

    target_shortfall: float = 0.01
    confidence: float = 0.95
    still_good_shortfall: float = 0.02
    phase_at_peak_rad: float = math.pi
    phase_at_peak_prior_rad: float = 0.02 * math.pi
    capture_phase_error_rad: float = 0.6 * math.pi
    min_contrast_ratio: float = 0.35
    phase_wrap_sigmas: float | None = 3.0
    bracket_step_hz: float | None = None
    max_lock_step_hz: float | None = None
    velocity_step_fraction: float = 0.05
    lock_shots_per_phase: int = 500
    velocity_shots_per_phase: int = 500
    ramsey_phases: int = 6
    phase_cubic_prior_fraction: float = 0.15
    drift_prior_hz_per_s: float = 3.0
    phase_velocity_error_rad: float = 1.0
    absorption_phase_window_rad: float = 0.2 * math.pi
    lock_acquired_shortfall: float = 0.03
    slope_sign: int = 0
    prior_slope_tolerance_fraction: float = 0.1
    prior_velocity_tolerance_fraction: float = 0.01
    fallback_initial_points: int = 6
    posterior_draws: int = 4000
    step_phase_stderr_rad: float = 0.15
    step_absorption_stderr: float = 0.005
    step_shots_range: tuple[float, float] = (0.5, 4.0)

    def __post_init__(self) -> None:
        open_unit = ("target_shortfall", "confidence", "still_good_shortfall", "lock_acquired_shortfall")
        for name in open_unit:
            value = getattr(self, name)
            if not is_number(value) or not 0.0 < float(value) < 1.0:
                raise ValueRefused(f"LockSettings.{name}: expected a number in (0, 1), got {value!r}")
        positive = ("phase_at_peak_prior_rad", "capture_phase_error_rad", "absorption_phase_window_rad")
        for name in positive:
            value = getattr(self, name)
            if not is_number(value) or not (math.isfinite(float(value)) and float(value) > 0.0):
                raise ValueRefused(f"LockSettings.{name}: expected a finite number > 0, got {value!r}")
        if self.capture_phase_error_rad >= math.pi:
            raise ValueRefused(f"LockSettings.capture_phase_error_rad: expected a number in (0, pi), "
                               f"got {self.capture_phase_error_rad!r}")
        for name in ("phase_cubic_prior_fraction", "drift_prior_hz_per_s", "phase_velocity_error_rad",
                     "prior_slope_tolerance_fraction", "prior_velocity_tolerance_fraction"):
            value = getattr(self, name)
            if not is_number(value) or not (math.isfinite(float(value)) and float(value) >= 0.0):
                raise ValueRefused(f"LockSettings.{name}: expected a finite number >= 0, got {value!r}")
        if not is_number(self.phase_at_peak_rad) or not math.isfinite(float(self.phase_at_peak_rad)):
            raise ValueRefused(f"LockSettings.phase_at_peak_rad: expected a finite number (rad), "
                               f"got {self.phase_at_peak_rad!r}")
        if not is_number(self.min_contrast_ratio) or not 0.0 <= float(self.min_contrast_ratio) < 1.0:
            raise ValueRefused(f"LockSettings.min_contrast_ratio: expected a number in [0, 1), "
                               f"got {self.min_contrast_ratio!r}")
        if self.phase_wrap_sigmas is not None and (
                not is_number(self.phase_wrap_sigmas)
                or not (math.isfinite(float(self.phase_wrap_sigmas)) and float(self.phase_wrap_sigmas) > 0.0)):
            raise ValueRefused(f"LockSettings.phase_wrap_sigmas: expected None or a finite number > 0, "
                               f"got {self.phase_wrap_sigmas!r}")
        if not is_number(self.velocity_step_fraction) or not 0.0 < float(self.velocity_step_fraction) < 0.5:
            raise ValueRefused(f"LockSettings.velocity_step_fraction: expected a number in (0, 0.5), "
                               f"got {self.velocity_step_fraction!r}")
        for name in ("bracket_step_hz", "max_lock_step_hz"):
            value = getattr(self, name)
            if value is not None and (not is_number(value) or not (math.isfinite(float(value)) and value > 0)):
                raise ValueRefused(f"LockSettings.{name}: expected None or a finite number > 0 (Hz), got {value!r}")
        for name, minimum in (("lock_shots_per_phase", 1), ("velocity_shots_per_phase", 1),
                              ("ramsey_phases", 3), ("fallback_initial_points", 1),
                              ("posterior_draws", 200)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
                raise ValueRefused(f"LockSettings.{name}: expected an integer >= {minimum}, got {value!r}")
        for name in ("step_phase_stderr_rad", "step_absorption_stderr"):
            value = getattr(self, name)
            if not is_number(value) or not (math.isfinite(float(value)) and float(value) > 0.0):
                raise ValueRefused(f"LockSettings.{name}: expected a finite number > 0, got {value!r}")
        low_high = self.step_shots_range
        if not (isinstance(low_high, tuple) and len(low_high) == 2 and all(is_number(v) for v in low_high)
                and 0.0 < low_high[0] <= 1.0 <= low_high[1] and math.isfinite(low_high[1])):
            raise ValueRefused(f"LockSettings.step_shots_range: expected (low, high) with 0 < low <= 1 <= high, "
                               f"got {low_high!r}")
        if self.slope_sign not in (-1, 0, 1) or isinstance(self.slope_sign, bool):
            raise ValueRefused(f"LockSettings.slope_sign: expected -1, 0 or +1, got {self.slope_sign!r}")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping of every setting."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


# --------------------------------------------------------------------------------------------
# What a calibration learned
# --------------------------------------------------------------------------------------------


_PRIOR_KEYS: dict[str, str] = {
    "velocity_m_per_s": "the calibrated velocity set-point (m/s), > 0",
    "velocity_stderr_m_per_s": "the standard error of the velocity of least absorption (m/s), >= 0",
    "detuning_hz": "the calibrated detuning set-point (Hz)",
    "slope_rad_per_hz": "the phase slope d phi / d delta (rad/Hz), non-zero",
    "slope_stderr_rad_per_hz": "its standard error (rad/Hz), >= 0",
    "cubic_rad_per_hz3": "the cubic coefficient of the phase curve (rad/Hz^3)",
    "cubic_stderr_rad_per_hz3": "its standard error (rad/Hz^3), >= 0",
    "phase_at_peak_rad": "the phase shift at the peak (rad)",
    "phase_at_peak_stderr_rad": "its standard error (rad), > 0",
    "absorption_min": "the least absorption P_e(one photon), in [0, 1]",
    "absorption_min_stderr": "its standard error, >= 0",
    "absorption_curvature": "k of P_e = P_min + k (v*/v - 1)^2, >= 0",
    "absorption_curvature_stderr": "its standard error, >= 0",
    "inversion": "the inversion at the lock, in (0, 1]",
}
_PRIOR_OPTIONAL: dict[str, str] = {
    "peak_drift_hz_per_s": "the rate of the peak's detuning set-point during the calibration (Hz/s)",
    "velocity_shortfall": "the calibration's velocity term at its chosen velocity (inversion fraction), >= 0",
    "velocity_shortfall_upper": "its upper bound at the calibration's confidence, >= velocity_shortfall",
    "mixture_empty_fraction": "the one-photon source's empty fraction q = p0 / (p1 |a|) the lock used, in [0, 1)",
}


@dataclass(frozen=True)
class LockPrior:
    """What a calibration learned, for the next retune (JSON-ready with :meth:`to_dict`).

    Attributes
    ----------
    velocity_m_per_s, detuning_hz : float
        The calibrated set-points (m/s, Hz).
    velocity_stderr_m_per_s : float
        Standard error of the velocity of least absorption (m/s).
    slope_rad_per_hz, slope_stderr_rad_per_hz : float
        Phase slope ``d phi / d delta`` at the peak and its standard error (rad/Hz).
    cubic_rad_per_hz3, cubic_stderr_rad_per_hz3 : float
        Cubic coefficient ``c`` of ``phi - phi* = s d + c d^3`` and its standard error.
    phase_at_peak_rad, phase_at_peak_stderr_rad : float
        Phase shift at the peak and its standard error (rad).
    absorption_min, absorption_min_stderr : float
        Least absorption P_e(one photon) and its standard error.
    absorption_curvature, absorption_curvature_stderr : float
        ``k`` of ``P_e = P_min + k (v*/v - 1)^2`` and its standard error.
    inversion : float
        The inversion scale at the lock.
    peak_drift_hz_per_s : float
        Rate of change of the peak's detuning set-point seen during the calibration (Hz/s;
        a cavity drifting up in frequency moves it down; information only).
    velocity_shortfall, velocity_shortfall_upper : float
        The calibration's velocity term at the velocity it chose (the relative inversion lost
        against the best of its inversion curve) and its upper bound at its confidence. A retune
        keeps that velocity and learns only whether the rig moved from it, so the calibration's
        own uncertainty of the velocity stays in every retune's bound (0 in a store written
        before these keys existed).
    mixture_empty_fraction : float
        The one-photon source's empty fraction ``q`` the calibration's lock read its phase with
        (:func:`autotune.analysis.lock_fit.mixture_phase_error`; 0 for a good source and in a
        store written before this key existed): the night's checks read theirs the same way.
    """

    velocity_m_per_s: float
    velocity_stderr_m_per_s: float
    detuning_hz: float
    slope_rad_per_hz: float
    slope_stderr_rad_per_hz: float
    cubic_rad_per_hz3: float
    cubic_stderr_rad_per_hz3: float
    phase_at_peak_rad: float
    phase_at_peak_stderr_rad: float
    absorption_min: float
    absorption_min_stderr: float
    absorption_curvature: float
    absorption_curvature_stderr: float
    inversion: float
    peak_drift_hz_per_s: float = 0.0
    velocity_shortfall: float = 0.0
    velocity_shortfall_upper: float = 0.0
    mixture_empty_fraction: float = 0.0

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if not is_number(value) or not math.isfinite(float(value)):
                raise ValueRefused(f"LockPrior.{f.name}: expected a finite number, got {value!r}")
            object.__setattr__(self, f.name, float(value))
        checks = (
            ("velocity_m_per_s", self.velocity_m_per_s > 0.0),
            ("slope_rad_per_hz", self.slope_rad_per_hz != 0.0),
            ("phase_at_peak_stderr_rad", self.phase_at_peak_stderr_rad > 0.0),
            ("absorption_min", 0.0 <= self.absorption_min <= 1.0),
            ("absorption_curvature", self.absorption_curvature >= 0.0),
            ("inversion", 0.0 < self.inversion <= 1.0),
            ("velocity_shortfall", 0.0 <= self.velocity_shortfall <= 1.0),
            ("velocity_shortfall_upper", self.velocity_shortfall <= self.velocity_shortfall_upper <= 1.0),
            ("mixture_empty_fraction", 0.0 <= self.mixture_empty_fraction < 1.0),
        )
        for name, ok in checks:
            if not ok:
                what = _PRIOR_KEYS.get(name) or _PRIOR_OPTIONAL[name]
                raise ValueRefused(f"LockPrior.{name}: expected {what}, got {getattr(self, name)!r}")
        for name in ("velocity_stderr_m_per_s", "slope_stderr_rad_per_hz", "cubic_stderr_rad_per_hz3",
                     "absorption_min_stderr", "absorption_curvature_stderr"):
            if getattr(self, name) < 0.0:
                raise ValueRefused(f"LockPrior.{name}: expected {_PRIOR_KEYS[name]}, got {getattr(self, name)!r}")

    def to_dict(self) -> dict[str, float]:
        """JSON-ready mapping of every field."""
        return {f.name: float(getattr(self, f.name)) for f in fields(self)}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> LockPrior:
        """Check and build from :meth:`to_dict`'s mapping.

        Raises
        ------
        ValueError
            Not a mapping, a missing or unknown key, or a value out of its range; the message
            names the key, what was expected and what was received.
        """
        if not isinstance(data, Mapping):
            raise ValueRefused(f"LockPrior: expected a mapping of {sorted(_PRIOR_KEYS)}, got {data!r}")
        missing = [key for key in _PRIOR_KEYS if key not in data]
        if missing:
            raise ValueRefused(f"LockPrior: missing key {missing[0]!r}: expected {_PRIOR_KEYS[missing[0]]}")
        unknown = sorted(set(data) - set(_PRIOR_KEYS) - set(_PRIOR_OPTIONAL))
        if unknown:
            raise ValueRefused(f"LockPrior: unknown key {unknown[0]!r}: expected only "
                               f"{sorted(_PRIOR_KEYS) + sorted(_PRIOR_OPTIONAL)}")
        for key, value in data.items():
            if not is_number(value) or not math.isfinite(float(value)):
                what = _PRIOR_KEYS.get(key) or _PRIOR_OPTIONAL[key]
                raise ValueRefused(f"LockPrior: key {key!r}: expected {what} as a finite number, got {value!r}")
        return cls(**{key: float(value) for key, value in data.items()})


# --------------------------------------------------------------------------------------------
# Internal models
# --------------------------------------------------------------------------------------------
