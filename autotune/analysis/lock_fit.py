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

__all__ = ["phase_signal_note", "mixture_phase_error", "mixture_phase_gain", "mixture_measured_phase",
           "detuning_offset",
           "LockFit", "log_evidence", "solve_gaussian", "wrap_phase"]

_TWO_PI = 2.0 * math.pi
# Newton steps when the lock's cubic curve is solved for the phase at the peak.
_NEWTON_STEPS = 8


def wrap_phase(angle: float | np.ndarray) -> Any:
    """Angle wrapped to [-pi, pi)."""
    return np.mod(np.asarray(angle, dtype=float) + math.pi, _TWO_PI) - math.pi


def phase_signal_note(result: PointResult, settings: LockSettings, phase_at_peak_rad: float, *,
                      wrap_sigmas: float | None = None) -> str | None:
    """None when a measurement's phase signal can steer the detuning, else why not.

    Usable means: fringes identified, a phase error ``|phi - phi*|`` within
    ``settings.capture_phase_error_rad`` (beyond it the angle wraps and the discriminator is no
    longer monotone), and a one-photon fringe whose phase means something: a one-photon contrast
    of at least ``settings.min_contrast_ratio`` of the empty one, or (with ``wrap_sigmas`` =
    ``z``: the calibration's and the retune's lock and the night's checks pass
    ``LockSettings.phase_wrap_sigmas``; without it only the fixed ratio) a phase error whose own standard error
    keeps it ``z`` standard errors from the wrap at pi, ``|phi - phi*| + z sigma_phi <= pi``.

    Why the second way: a poor one-photon source (probability ``p1`` of one photon, the rest
    mostly empty) gives the one-photon fringe the amplitude ``p0 + p1 a_g(1)`` (docs/physics.md
    section 5b), whose contrast is about ``2 p1 - 1`` of the empty one near the best (0.16 at
    ``p1 = 0.58``), below any fixed ratio that still refuses a pi rotation, while its phase moves
    ``p1 / (2 p1 - 1)`` times faster with the true phase error: weaker, not useless, and its
    standard error (measured at every point) says how much it is worth. Near a pi rotation
    (``a_g(1) ~ 0``) the amplitude tends to ``p0 >= 0``, a phase near 0, a phase error near pi:
    outside the capture range; near the crossing where the amplitude vanishes the contrast and
    so the phase's own standard error explode. Both are refused.
    """
    if not result.identified:
        return "fringes not identified"
    ratio = result.contrast_one_photon / result.contrast_empty if result.contrast_empty > 0 else 0.0
    error = float(wrap_phase(result.phase_shift - phase_at_peak_rad))
    z = wrap_sigmas
    sigma = float(result.phase_shift_stderr)
    low = result.contrast_empty <= 0.0 or ratio < settings.min_contrast_ratio
    if low and not (z is not None and result.contrast_empty > 0.0 and math.isfinite(sigma)
                    and abs(error) + z * sigma <= math.pi
                    and abs(error) <= settings.capture_phase_error_rad):
        note = f"one-photon/empty contrast {ratio:.2f} below {settings.min_contrast_ratio:.2f}"
        if z is not None:
            note += (f" and the phase error {error / math.pi:+.2f} pi +- {sigma:.2f} rad not "
                     f"{z:g} standard errors inside the wrap at pi")
        return note
    if abs(error) > settings.capture_phase_error_rad:
        return (f"phase error {error / math.pi:+.2f} pi beyond the capture range "
                f"+-{settings.capture_phase_error_rad / math.pi:.2f} pi")
    return None


def mixture_phase_error(measured_rad: Any, empty_fraction: Any) -> Any:
    """The one-photon phase error ``eps`` behind a measured phase error of a mixed field.

    For a field ``p0 |0> + p1 |1>`` with ``a_g(1) = -e^{i eps}`` (a full rotation off by the
    phase ``eps``), the one-photon fringe's amplitude is ``p0 - p1 e^{i eps}`` (docs/physics.md
    section 5b: the photon-number average of ``a_g(n)``), so the measured phase error
    ``psi = arg(e^{i eps} - q) `` with ``q = p0 / p1``; the triangle 0, ``q``, ``e^{i eps}``
    (law of sines) inverts it: ``eps = psi - arcsin(q sin psi)``. Near the peak
    ``psi ~ eps / (1 - q) = eps p1 / (p1 - p0)``: 3.6 times ``eps`` at ``p1 = 0.58``.

    Parameters
    ----------
    measured_rad : float or array
        Measured phase error ``psi`` (rad), unwrapped (the law is continued beyond ``+-pi``
        by the same formula, still increasing: a draw of a posterior may reach there).
    empty_fraction : float or array
        ``q = p0 / p1`` in ``[0, 1)`` (0: a pure photon, ``eps = psi``).
    """
    psi = np.asarray(measured_rad, dtype=float)
    q = np.asarray(empty_fraction, dtype=float)
    return psi - np.arcsin(np.clip(q * np.sin(psi), -1.0, 1.0))


def mixture_phase_gain(measured_rad: float, empty_fraction: float) -> float:
    """``d eps / d psi`` of :func:`mixture_phase_error` at the measured phase error ``psi``:
    ``1 - q cos psi / sqrt(1 - q^2 sin^2 psi)`` (``1 - q`` at the peak), the factor by which a
    measured phase's noise moves the one-photon phase error (the delta method)."""
    q = float(empty_fraction)
    sine = q * math.sin(measured_rad)
    return 1.0 - q * math.cos(measured_rad) / math.sqrt(max(1.0 - sine * sine, 1e-12))


def mixture_measured_phase(error_rad: Any, empty_fraction: Any) -> Any:
    """The measured phase error ``psi = arg(e^{i eps} - q)`` of a true phase error ``eps``
    (the inverse of :func:`mixture_phase_error`), rad."""
    eps = np.asarray(error_rad, dtype=float)
    q = np.asarray(empty_fraction, dtype=float)
    return np.arctan2(np.sin(eps), np.cos(eps) - q)


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
