"""The hold's drift lock and sequential test, and the hold's settings (pure).

:class:`DriftLock` (the two-state Kalman filter that follows the peak's detuning set-point and
its drift rate), :class:`SequentialTest` (Page's CUSUM on the lock's standardised innovations
and on the inversion) with its run lengths (:func:`cusum_arl`, :func:`cusum_threshold`),
:class:`HoldSettings`, and the design shift a floor on the inversion allows
(:func:`floor_shift_hz`), and the reading of a check's phase error as the set-point's offset from
the peak (:func:`peak_offset`, with the mixture law of a poor one-photon source).
:mod:`autotune.analysis.hold` describes the whole and re-exports these.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from scipy import optimize

from autotune.analysis.guided import LockPrior, LockSettings, detuning_offset
from autotune.analysis.lock_fit import mixture_measured_phase, mixture_phase_error, mixture_phase_gain
from autotune.errors import ValueRefused

__all__ = [
    "SIEGMUND_CORRECTION",
    "RATE_WALK_HZ_PER_S_PER_SQRT_S",
    "is_finite_number",
    "cusum_arl",
    "two_sided_arl",
    "cusum_threshold",
    "SequentialTest",
    "Innovation",
    "DriftLock",
    "HoldSettings",
    "known_cubic",
    "floor_shift_hz",
    "floor_phase_rad",
    "peak_offset",
    "reading_phase_sd",
    "fringe_variances_per_atom",
    "two_pi_pulse_phase_rad",
    "step_reading",
]

#: Siegmund's correction of the CUSUM threshold for the overshoot of a Gaussian random walk:
#: ``b = h + 2 * 0.583`` (D. Siegmund, Sequential Analysis, Springer 1985; from memory).
SIEGMUND_CORRECTION = 1.166

# The drift rate itself wanders: 0.2 Hz/s per square root of an hour (a ramp of 0.7 kHz/h
# that may change by that much over an hour). Only its order matters: it keeps the filter
# from freezing its rate estimate over a long night.
RATE_WALK_HZ_PER_S_PER_SQRT_S = 0.2 / 60.0


def is_finite_number(value: Any) -> bool:
    """A finite real number, not a bool (numpy scalars included)."""
    return not isinstance(value, bool) and isinstance(value, (int, float, np.floating, np.integer)) \
        and math.isfinite(float(value))


# --------------------------------------------------------------------------------------------
# The sequential test
# --------------------------------------------------------------------------------------------


def cusum_arl(shift: float, reference: float, threshold: float) -> float:
    """Siegmund's approximation of a one-sided CUSUM's average run length (checks).

    For ``S_n = max(0, S_{n-1} + z_n - k)`` with ``z ~ N(shift, 1)`` and an alarm at
    ``S_n > h``: ``ARL = (exp(-2 D b) + 2 D b - 1) / (2 D^2)`` with ``D = shift - k`` and
    ``b = h + 1.166``; ``b^2`` when ``D = 0`` (D. Siegmund, Sequential Analysis, Springer 1985;
    from memory). Infinite when the exponential overflows.
    """
    delta = float(shift) - float(reference)
    b = float(threshold) + SIEGMUND_CORRECTION
    if abs(delta) < 1e-9:
        return b * b
    x = 2.0 * delta * b
    if -x > 700.0:
        return math.inf
    return (math.expm1(-x) + x) / (2.0 * delta * delta)


def two_sided_arl(shift: float, reference: float, threshold: float) -> float:
    """Average run length of two one-sided CUSUMs (upper on ``z``, lower on ``-z``) run together.

    Their alarm rates add: ``1 / ARL = 1 / ARL+(shift) + 1 / ARL-(shift)``, with
    ``ARL-(shift) = ARL+(-shift)`` (the usual approximation for a two-sided CUSUM; from memory).
    """
    upper = cusum_arl(shift, reference, threshold)
    lower = cusum_arl(-shift, reference, threshold)
    rate = (0.0 if math.isinf(upper) else 1.0 / upper) + (0.0 if math.isinf(lower) else 1.0 / lower)
    return math.inf if rate == 0.0 else 1.0 / rate


def cusum_threshold(reference: float, in_control_arl: float) -> float:
    """The threshold ``h`` whose one-sided in-control ARL (Siegmund) is ``in_control_arl`` checks.

    Returns 0 when even ``h = 0`` reaches it.
    """
    if not (is_finite_number(reference) and reference >= 0.0):
        raise ValueRefused(f"reference: expected a finite number >= 0, got {reference!r}")
    if not (is_finite_number(in_control_arl) and in_control_arl >= 1.0):
        raise ValueRefused(f"in_control_arl: expected a finite number >= 1, got {in_control_arl!r}")
    target = math.log(in_control_arl)
    if math.log(cusum_arl(0.0, reference, 0.0)) >= target:
        return 0.0
    high = 1.0
    while math.log(cusum_arl(0.0, reference, high)) < target:
        high *= 2.0
        if high > 1e4:
            raise ValueRefused(f"in_control_arl {in_control_arl!r} out of reach")
    return float(optimize.brentq(lambda h: math.log(cusum_arl(0.0, reference, h)) - target,
                                 0.0, high, xtol=1e-9))


@dataclass(frozen=True)
class SequentialTest:
    """The design of the night's CUSUMs, in units of each statistic's standard deviation.

    Attributes
    ----------
    reference, threshold, warning : float
        ``k``, ``h`` and the warning level ``w`` of the two-sided test on the lock's
        standardised innovations.
    inversion_reference, inversion_threshold, inversion_warning : float
        The same for the one-sided test on the inversion's standardised drop.
    """

    reference: float
    threshold: float
    warning: float
    inversion_reference: float
    inversion_threshold: float
    inversion_warning: float

    @staticmethod
    def step(upper: float, lower: float, z: float, reference: float) -> tuple[float, float]:
        """One step of Page's two-sided CUSUM: ``(max(0, S+ + z - k), max(0, S- - z - k))``."""
        return max(0.0, upper + z - reference), max(0.0, lower - z - reference)


# --------------------------------------------------------------------------------------------
# The drift lock
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Innovation:
    """One update of the drift lock: the measured peak minus the predicted one.

    Attributes
    ----------
    value_hz : float
        ``y - p^-`` (Hz).
    variance_hz2 : float
        Its predicted variance ``P^- + R`` (Hz^2).
    gain : float
        The gain applied to the peak (bounded by ``max_gain``).
    z : float
        ``value_hz / sqrt(variance_hz2)``.
    """

    value_hz: float
    variance_hz2: float
    gain: float
    z: float


@dataclass(frozen=True)
class DriftLock:
    """Kalman filter of the peak's detuning set-point ``p`` (Hz) and its drift rate ``r`` (Hz/s).

    Model between checks ``tau`` apart: ``p <- p + r tau + w_p``, ``r <- r + w_r`` with
    ``Var w_p = q tau`` (the cavity's random walk, ``q = walk_hz_per_sqrt_s^2``) and the rate
    wandering as a random walk of its own (integrated into ``p``). A check measures ``p``
    directly: ``y = d - D``.

    Attributes
    ----------
    clock_s : float
        Rig time of the estimate (s).
    peak_hz, rate_hz_per_s : float
        Posterior means.
    covariance : tuple of tuples
        Their 2 x 2 covariance (Hz^2, Hz^2/s, Hz^2/s^2).
    walk_hz_per_sqrt_s : float
        The random walk assumed for the peak (Hz/s^0.5).
    """

    clock_s: float
    peak_hz: float
    rate_hz_per_s: float
    covariance: tuple[tuple[float, float], tuple[float, float]]
    walk_hz_per_sqrt_s: float

    @classmethod
    def start(cls, clock_s: float, peak_hz: float, peak_stderr_hz: float, rate_hz_per_s: float,
              rate_stderr_hz_per_s: float, walk_hz_per_sqrt_s: float) -> DriftLock:
        """A lock at ``peak_hz`` known to ``peak_stderr_hz``, its rate to ``rate_stderr_hz_per_s``."""
        for name, value in (("clock_s", clock_s), ("peak_hz", peak_hz),
                            ("peak_stderr_hz", peak_stderr_hz), ("rate_hz_per_s", rate_hz_per_s),
                            ("rate_stderr_hz_per_s", rate_stderr_hz_per_s),
                            ("walk_hz_per_sqrt_s", walk_hz_per_sqrt_s)):
            if not is_finite_number(value):
                raise ValueRefused(f"{name}: expected a finite number, got {value!r}")
        return cls(float(clock_s), float(peak_hz), float(rate_hz_per_s),
                   ((float(peak_stderr_hz) ** 2, 0.0), (0.0, float(rate_stderr_hz_per_s) ** 2)),
                   float(walk_hz_per_sqrt_s))

    @property
    def _cov(self) -> np.ndarray:
        return np.array(self.covariance, dtype=float)

    @property
    def peak_stderr_hz(self) -> float:
        """Standard error of the peak (Hz)."""
        return math.sqrt(max(self.covariance[0][0], 0.0))

    @property
    def rate_stderr_hz_per_s(self) -> float:
        """Standard error of the rate (Hz/s)."""
        return math.sqrt(max(self.covariance[1][1], 0.0))

    def _process(self, tau: float) -> np.ndarray:
        q = self.walk_hz_per_sqrt_s**2
        qr = RATE_WALK_HZ_PER_S_PER_SQRT_S**2
        return np.array([[q * tau + qr * tau**3 / 3.0, qr * tau**2 / 2.0],
                         [qr * tau**2 / 2.0, qr * tau]])

    def predict(self, clock_s: float) -> DriftLock:
        """The estimate carried to ``clock_s`` (forwards or backwards in rig time)."""
        tau = float(clock_s) - self.clock_s
        transition = np.array([[1.0, tau], [0.0, 1.0]])
        cov = transition @ self._cov @ transition.T + self._process(abs(tau))
        cov = 0.5 * (cov + cov.T)
        return replace(self, clock_s=float(clock_s),
                       peak_hz=self.peak_hz + self.rate_hz_per_s * tau,
                       covariance=((float(cov[0, 0]), float(cov[0, 1])),
                                   (float(cov[1, 0]), float(cov[1, 1]))))

    def peak_at(self, clock_s: float) -> float:
        """Predicted peak at ``clock_s`` (Hz)."""
        return self.peak_hz + self.rate_hz_per_s * (float(clock_s) - self.clock_s)

    def update(self, clock_s: float, peak_hz: float, variance_hz2: float, *,
               max_gain: float = 1.0, learn_rate: bool = True) -> tuple[DriftLock, Innovation]:
        """Tell the lock one measured peak (Hz, with its variance) at ``clock_s``.

        The Kalman gain of the peak is bounded by ``max_gain`` (both gains scaled alike); the
        covariance is updated in Joseph form, right for any gain. With ``learn_rate`` False the
        rate's gain is zero (the peak alone moves): a check taken while a change is suspected
        measures the change, not the drift, and a step the filter followed into its rate would
        stay there as a ramp.
        """
        if not (is_finite_number(peak_hz) and is_finite_number(variance_hz2) and variance_hz2 > 0.0):
            raise ValueRefused(f"peak_hz, variance_hz2: expected finite numbers (variance > 0), "
                               f"got {peak_hz!r}, {variance_hz2!r}")
        prior = self.predict(clock_s)
        cov = prior._cov
        innovation = float(peak_hz) - prior.peak_hz
        s = float(cov[0, 0] + variance_hz2)
        gain = cov[:, 0] / s
        if gain[0] > max_gain:
            gain = gain * (max_gain / gain[0])
        if not learn_rate:
            gain = np.array([gain[0], 0.0])
        a = np.eye(2) - np.outer(gain, [1.0, 0.0])
        post = a @ cov @ a.T + variance_hz2 * np.outer(gain, gain)
        post = 0.5 * (post + post.T)
        lock = replace(prior, peak_hz=prior.peak_hz + float(gain[0]) * innovation,
                       rate_hz_per_s=prior.rate_hz_per_s + float(gain[1]) * innovation,
                       covariance=((float(post[0, 0]), float(post[0, 1])),
                                   (float(post[1, 0]), float(post[1, 1]))))
        return lock, Innovation(innovation, s, float(gain[0]), innovation / math.sqrt(s))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping."""
        return {"clock_s": self.clock_s, "peak_hz": self.peak_hz,
                "rate_hz_per_s": self.rate_hz_per_s,
                "covariance": [list(row) for row in self.covariance],
                "walk_hz_per_sqrt_s": self.walk_hz_per_sqrt_s}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> DriftLock:
        """Rebuild from :meth:`to_dict`."""
        cov = data["covariance"]
        return cls(float(data["clock_s"]), float(data["peak_hz"]), float(data["rate_hz_per_s"]),
                   ((float(cov[0][0]), float(cov[0][1])), (float(cov[1][0]), float(cov[1][1]))),
                   float(data["walk_hz_per_sqrt_s"]))


# --------------------------------------------------------------------------------------------
# Settings
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class HoldSettings:
    """What the night's decisions depend on (from ``[track]``, ``[lock]`` and ``[measurement]``).

    Attributes
    ----------
    floor : float
        The condition: inversion at least this fraction of the best.
    budget_fraction : float
        Largest share of beam time holding may take (checks, retunes, calibrations).
    false_alarm_interval_s : float
        Mean rig time between false alarms the sequential test is designed for (s).
    max_gain : float
        Largest gain of the lock's correction of the peak.
    max_correction_hz, min_correction_hz : float
        Largest correction of one check, and the smallest one worth a move (Hz).
    min_shots_per_phase, max_shots_per_phase : int
        Shots per field and Ramsey phase of a check: at least, and at most (the rig's limit).
    max_interval_s : float
        Longest interval between checks (rig s).
    walk_hz_per_sqrt_s : float
        Random walk of the cavity assumed by the lock (Hz/s^0.5).
    inversion_drop : float
        Drop of the inversion, as a fraction of its reference, that the inversion watch is
        designed to detect.
    ramsey_phases : int
        Ramsey phases of a check (the measurement's).
    repetition_rate_hz : float
        Shots per second of rig time (the rig's).
    lock : LockSettings
        The phase lock's settings (capture range, contrast ratio) for the usability of a check.
    """

    floor: float
    budget_fraction: float
    false_alarm_interval_s: float
    max_gain: float
    max_correction_hz: float
    min_correction_hz: float
    min_shots_per_phase: int
    max_shots_per_phase: int
    max_interval_s: float
    walk_hz_per_sqrt_s: float
    inversion_drop: float
    ramsey_phases: int
    repetition_rate_hz: float
    lock: LockSettings


def known_cubic(prior: LockPrior) -> float:
    """The stored cubic of the phase curve when it is known (two standard errors from zero), else 0.

    A short calibration leaves the cubic poorly determined; used anyway it can bend a large
    phase error into a wrong detuning (the linear discriminator is the better guess then).
    """
    c, sd = prior.cubic_rad_per_hz3, prior.cubic_stderr_rad_per_hz3
    return c if abs(c) >= 2.0 * sd else 0.0


def floor_shift_hz(floor: float, slope_rad_per_hz: float, empty_fraction: float = 0.0) -> float:
    """The detuning error whose phase error alone takes the inversion to ``floor`` of the best (Hz).

    With ``|a| = 1`` the inversion is ``cos(eps / 2)`` of the best (docs/physics.md section 3, see
    :mod:`autotune.analysis.guided`), so ``eps = 2 acos(floor)`` and the shift is ``eps / |slope|``.
    A poor one-photon source (``empty_fraction`` ``q > 0``, :attr:`LockPrior.mixture_empty_fraction`)
    measures a phase ``1 / (1 - q)`` times steeper near the peak than the one-photon phase
    ``eps`` (:func:`autotune.analysis.lock_fit.mixture_phase_error`), and the stored slope is the
    measured one: the one-photon slope is ``(1 - q) |slope|``.
    """
    return 2.0 * math.acos(float(floor)) / (abs(float(slope_rad_per_hz)) * (1.0 - float(empty_fraction)))


def floor_phase_rad(floor: float, empty_fraction: float = 0.0) -> float:
    """The measured phase error at :func:`floor_shift_hz` (rad): ``2 acos(floor)`` for a pure
    photon, its mixture reading :func:`autotune.analysis.lock_fit.mixture_measured_phase` else."""
    return float(mixture_measured_phase(2.0 * math.acos(float(floor)), float(empty_fraction)))


def peak_offset(error_rad: float, error_stderr_rad: float, prior: LockPrior) -> tuple[float, float]:
    """The held set-point minus the peak (Hz) and its standard error, from a check's phase error.

    A pure photon (``prior.mixture_empty_fraction`` 0): the stored curve ``s D + c D^3``
    (:func:`known_cubic`) solved by :func:`~autotune.analysis.lock_fit.detuning_offset`. A poor
    source (``q > 0``), as the calibration's lock read it: the measured error ``psi`` is the
    one-photon error ``eps = psi - arcsin(q sin psi)``
    (:func:`~autotune.analysis.lock_fit.mixture_phase_error`), read on the one-photon line
    ``eps = (1 - q) s D`` (near the peak the measured phase is ``1 / (1 - q)`` times steeper,
    and ``s`` is the measured slope). The stored cubic is not used there: fitted in the measured
    phase, it is mostly the law's own bend (its Taylor term ``-q (1 + q) / (6 (1 - q)^3)
    eps^3``, hundreds of times the one-photon curve's cubic at ``q`` of 0.7) and, with the law's
    higher orders folded in, it misreads a 12 kHz offset by a third at ``p1`` 0.6
    (tests/test_hold_poor_source.py).
    The standard error follows by the delta method
    (:func:`~autotune.analysis.lock_fit.mixture_phase_gain`).
    """
    q = float(prior.mixture_empty_fraction)
    if q <= 0.0:
        return detuning_offset(error_rad, error_stderr_rad, prior.slope_rad_per_hz, 0.0,
                               known_cubic(prior), 0.0)
    error = float(mixture_phase_error(error_rad, q))
    derivative = mixture_phase_gain(error_rad, q)
    return detuning_offset(error, abs(derivative) * error_stderr_rad,
                           (1.0 - q) * prior.slope_rad_per_hz, 0.0, 0.0, 0.0)


def fringe_variances_per_atom(contrast: float) -> tuple[float, float]:
    """``(Var chi, Var C)`` of one Ramsey fringe of contrast ``C`` times its detected atoms:
    ``(2 - C^2 / 2) / C^2`` and ``2 - 3 C^2 / 2`` (binomial least squares over the fringe's
    phases and the delta method; :class:`~autotune.analysis.hold_signal.SignalModel`), the
    contrast taken within ``[1e-3, 1]``."""
    c = min(max(float(contrast), 1e-3), 1.0)
    return (2.0 - 0.5 * c * c) / (c * c), 2.0 - 1.5 * c * c


def reading_phase_sd(phase_sd_at_peak_rad: float, error_rad: float, empty_fraction: float,
                     contrast_empty: float, contrast_one_photon: float) -> float:
    """The standard error of a check's measured phase error ``psi`` at its own reading (rad),
    from the pooled one ``phase_sd_at_peak_rad`` of checks at the peak and the check's own
    measured fringes.

    A poor one-photon source (``empty_fraction`` ``q = p0 / p1 > 0``) measures the one-photon
    fringe with amplitude ``p1 |e^{i eps} - q|`` (docs/physics.md section 5b; ``eps`` the
    one-photon phase error, :func:`~autotune.analysis.lock_fit.mixture_phase_error`): ``1 - q``
    of ``p1`` at the peak, ``r = |e^{i eps} - q| / (1 - q)`` times that at the reading, so the
    check's one-photon contrast ``C1`` stood at ``C1 / r`` at the peak. A fringe of contrast
    ``C`` fitted to ``N`` detected atoms has ``Var chi = (2 - C^2 / 2) / (N C^2)``
    (:class:`~autotune.analysis.hold_signal.SignalModel`, binomial least squares and the delta
    method), and the photon phase shift is the difference of the empty and the one-photon
    fringe, each on half of the shots, so the phase variance at the reading is the pooled one
    times ``[v(C0) + v(C1)] / [v(C0) + v(C1 / r)]`` with ``v(C) = (2 - C^2 / 2) / C^2`` and the
    check's own contrasts ``C0``, ``C1`` (equal atoms in both fields assumed). The ratio is
    between ``1 / r^2`` and 1, so the check's own noisy contrast moves it little; a pure photon
    (``q = 0``: ``r = 1``) keeps the pooled value exactly. Carried through the law's derivative
    at the reading (:func:`peak_offset`, the delta method: G. Casella and R. L. Berger,
    Statistical Inference, 2nd ed. (2002), section 5.5.4), it is the reading's own noise:
    the pooled noise of the peak carried through the law's larger gain far from the peak
    overstates it (2.6 times the peak's at ``eps`` 1 rad, ``q`` 0.6, against 1.25 on the
    fringe's own; benchmarks/README.md, session 8).
    """
    q = float(empty_fraction)
    sd = float(phase_sd_at_peak_rad)
    if q <= 0.0:
        return sd
    eps = float(mixture_phase_error(float(error_rad), q))
    r = abs(complex(math.cos(eps) - q, math.sin(eps))) / (1.0 - q)

    def per_atom(contrast: float) -> float:
        return fringe_variances_per_atom(contrast)[0]

    c0 = contrast_empty if is_finite_number(contrast_empty) else 0.0
    c1 = contrast_one_photon if is_finite_number(contrast_one_photon) else 0.0
    ratio = (per_atom(c0) + per_atom(c1)) / (per_atom(c0) + per_atom(float(c1) / r))
    return sd * math.sqrt(min(max(ratio, 0.0), 1.0))


def two_pi_pulse_phase_rad(shift_hz: float, slope_rad_per_hz: float) -> float:
    """The one-photon phase error of a set-point ``shift_hz`` from the peak, on the law of a 2π
    pulse whose slope at the peak is ``slope_rad_per_hz``: ``eps = 2 atan(s D / 2)`` (rad).

    A pulse ``Omega(t) = Omega_0 sech(t / T)`` of area 2π returns the atom to g at every
    detuning ``Delta`` with ``a_g = -(1 - i Delta T) / (1 + i Delta T)`` (the Rosen-Zener
    solution, N. Rosen and C. Zener, Phys. Rev. 40, 502 (1932); the 2π pulse of self-induced
    transparency, S. L. McCall and E. L. Hahn, Phys. Rev. 183, 457 (1969)): its phase error
    ``2 atan(Delta T)`` is linear near the peak, with slope ``2 T``, and bends towards ±π
    away from it. The Gaussian mode's 2π crossing follows the same law to within 0.5 % of the
    phase at 15 kHz (docs/physics.md section 5b; tests/test_hold_step_reading.py against
    qutip), so a check 15 kHz from the peak sees about 13 kHz on the stored slope's line.
    """
    s = float(slope_rad_per_hz)
    return 2.0 * math.atan(0.5 * s * float(shift_hz))


def step_reading(shift_hz: float, prior: LockPrior) -> tuple[float, float]:
    """What a check reads, without noise, when the set-point is ``shift_hz`` from the peak:
    ``(offset_hz, noise_scale)``.

    The phase error of the shift is the 2π pulse's (:func:`two_pi_pulse_phase_rad`) on the
    one-photon slope ``(1 - q) s`` (``q`` the source's empty fraction, ``s`` the stored measured
    slope), measured through the mixture's law (:func:`~autotune.analysis.lock_fit.
    mixture_measured_phase`) and read back by the check's own :func:`peak_offset`. The check's
    line (and a known cubic, when the stored curve has one) does not follow the bend, so the
    offset read is smaller than the shift: a 15 kHz step reads about 13 kHz. The plan states
    the first check's chance to flag the step so read beside the full step's
    (:func:`autotune.analysis.hold_plan.plan_checks`); it is not yet chosen on (choosing on it
    was measured and not kept: benchmarks/README.md, session 8).
    ``noise_scale`` is the standard error :func:`peak_offset` gives that reading over the one
    it gives at the peak, for the same phase noise (1 on the line; the mixture's law and a
    cubic change it), so that the innovation's variance at the step is ``P^- + R scale^2``.
    """
    q = float(prior.mixture_empty_fraction)
    one_photon = (1.0 - q) * float(prior.slope_rad_per_hz)
    measured = float(mixture_measured_phase(two_pi_pulse_phase_rad(shift_hz, one_photon), q))
    offset, spread = peak_offset(measured, 1.0, prior)
    _, at_peak = peak_offset(0.0, 1.0, prior)
    return float(offset), float(spread / at_peak) if at_peak > 0.0 else 1.0
