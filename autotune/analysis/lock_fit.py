"""The detuning lock's fit: the photon phase shift against the detuning (pure, no I/O).

The phase shift is a signed, nearly linear function of the detuning near the peak; a weighted
fit ``phi = alpha + s d + c (d / h)^3 + beta (t - t_ref)`` with Gaussian priors gives the
detuning where the phase equals the phase at the peak, with its uncertainty (see
:mod:`autotune.analysis.guided` for the physics and the priors).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from autotune.analysis.search import PointResult

if TYPE_CHECKING:
    from autotune.analysis.lock_settings import LockSettings

__all__ = ["phase_signal_note", "detuning_offset", "LockFit", "log_evidence", "solve_gaussian",
           "wrap_phase"]

_TWO_PI = 2.0 * math.pi
# Newton steps when the lock's cubic curve is solved for the phase at the peak.
_NEWTON_STEPS = 8


def wrap_phase(angle: float | np.ndarray) -> Any:
    """Angle wrapped to [-pi, pi)."""
    return np.mod(np.asarray(angle, dtype=float) + math.pi, _TWO_PI) - math.pi


def phase_signal_note(result: PointResult, settings: LockSettings, phase_at_peak_rad: float) -> str | None:
    """None when a measurement's phase signal can steer the detuning, else why not.

    Usable means: fringes identified, a one-photon contrast of at least
    ``settings.min_contrast_ratio`` of the empty one (near a pi or 3 pi rotation both fall),
    and a phase error ``|phi - phi*|`` within ``settings.capture_phase_error_rad`` (beyond it
    the angle wraps and the discriminator is no longer monotone).
    """
    if not result.identified:
        return "fringes not identified"
    if result.contrast_empty <= 0.0 or \
            result.contrast_one_photon < settings.min_contrast_ratio * result.contrast_empty:
        ratio = result.contrast_one_photon / result.contrast_empty if result.contrast_empty > 0 else 0.0
        return f"one-photon/empty contrast {ratio:.2f} below {settings.min_contrast_ratio:.2f}"
    error = float(wrap_phase(result.phase_shift - phase_at_peak_rad))
    if abs(error) > settings.capture_phase_error_rad:
        return (f"phase error {error / math.pi:+.2f} pi beyond the capture range "
                f"+-{settings.capture_phase_error_rad / math.pi:.2f} pi")
    return None


def detuning_offset(error_rad: float, error_stderr_rad: float, slope_rad_per_hz: float,
                    slope_stderr_rad_per_hz: float, cubic_rad_per_hz3: float = 0.0,
                    cubic_stderr_rad_per_hz3: float = 0.0) -> tuple[float, float]:
    """The detuning set-point minus the peak's, from a phase error and the stored phase curve.

    Solves ``error = s D + c D^3`` for ``D`` (Newton steps while the curve stays monotone with
    the slope's sign, else the linear solution), with its standard error by the delta method
    from the phase error's, the slope's and the cubic's.

    Returns
    -------
    (float, float)
        ``D`` and its standard error (Hz).
    """
    slope, c3 = float(slope_rad_per_hz), float(cubic_rad_per_hz3)
    offset = error_rad / slope
    for _ in range(_NEWTON_STEPS):
        derivative = slope + 3.0 * c3 * offset**2
        if derivative * slope <= 0.25 * slope**2:
            offset = error_rad / slope
            break
        offset -= (slope * offset + c3 * offset**3 - error_rad) / derivative
    derivative = slope + 3.0 * c3 * offset**2
    if derivative * slope <= 0.25 * slope**2:
        derivative = slope
    offset_sd = math.sqrt((error_stderr_rad**2 + (offset * slope_stderr_rad_per_hz) ** 2
                           + (offset**3 * cubic_stderr_rad_per_hz3) ** 2) / derivative**2)
    return float(offset), float(offset_sd)


@dataclass(frozen=True)
class LockFit:
    """Posterior of the phase curve ``alpha + s d + c (d/h)^3 + beta (t - t_ref)`` at one velocity."""

    velocity: float
    centre_hz: float
    step_hz: float
    t_ref: float | None
    theta: np.ndarray
    cov: np.ndarray
    points: int

    def features(self, detuning: float, clock: float | None) -> np.ndarray:
        d = detuning - self.centre_hz
        tau = 0.0 if (self.t_ref is None or clock is None) else clock - self.t_ref
        return np.array([1.0, d, (d / self.step_hz) ** 3, tau])

    @property
    def slope(self) -> float:
        return float(self.theta[1])

    @property
    def slope_stderr(self) -> float:
        return float(math.sqrt(max(self.cov[1, 1], 0.0)))

    def slope_known(self) -> bool:
        """The slope's sign is established (its posterior mean is two standard errors from 0)."""
        return self.points >= 1 and abs(self.slope) >= 2.0 * self.slope_stderr and self.slope != 0.0

    def phase(self, detuning: float, clock: float | None) -> tuple[float, float]:
        """Posterior mean and variance of the phase at ``detuning`` (Hz) and ``clock`` (s)."""
        x = self.features(detuning, clock)
        return float(x @ self.theta), float(max(x @ self.cov @ x, 0.0))

    def solve(self, phase_star: float, phase_star_var: float, clock: float | None,
              max_offset_hz: float) -> tuple[float, float, float]:
        """Detuning where the curve crosses ``phase_star``: (delta*, its stderr, local slope)."""
        tau = 0.0 if (self.t_ref is None or clock is None) else clock - self.t_ref
        alpha, s, c3, beta = (float(v) for v in self.theta)
        h = self.step_hz
        a = alpha + beta * tau - phase_star
        d = -a / s
        for _ in range(_NEWTON_STEPS):
            value = a + s * d + c3 * (d / h) ** 3
            derivative = s + 3.0 * c3 * d * d / h**3
            # Only while the curve stays monotone with the fitted slope's sign.
            if derivative * s <= 0.25 * s * s:
                d = -a / s
                break
            d -= value / derivative
        d = float(np.clip(d, -max_offset_hz, max_offset_hz))
        derivative = s + 3.0 * c3 * d * d / h**3
        if derivative * s <= 0.25 * s * s:
            derivative = s
        gradient = -np.array([1.0, d, (d / h) ** 3, tau]) / derivative
        variance = float(gradient @ self.cov @ gradient) + phase_star_var / derivative**2
        return self.centre_hz + d, math.sqrt(max(variance, 0.0)), derivative


def solve_gaussian(design: np.ndarray, values: np.ndarray, variances: np.ndarray,
                    prior_mean: np.ndarray, prior_precision: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Posterior mean and covariance of a linear-Gaussian model with a Gaussian prior."""
    weights = 1.0 / variances
    precision = design.T @ (design * weights[:, None]) + prior_precision
    rhs = design.T @ (values * weights) + prior_precision @ prior_mean
    cov = np.linalg.inv(precision)
    cov = 0.5 * (cov + cov.T)
    return cov @ rhs, cov


def log_evidence(design: np.ndarray, values: np.ndarray, variances: np.ndarray,
                  prior_mean: np.ndarray, prior_sd: np.ndarray) -> float:
    """Log marginal likelihood of a linear-Gaussian model, ``N(y | X m, X S X^T + D)`` (no constant)."""
    covariance = np.diag(variances) + (design * prior_sd**2) @ design.T
    residual = values - design @ prior_mean
    _, logdet = np.linalg.slogdet(covariance)
    return float(-0.5 * residual @ np.linalg.solve(covariance, residual) - 0.5 * logdet)
