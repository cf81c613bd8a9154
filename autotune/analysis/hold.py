"""Holding the 2π condition through the night: the lock, the sequential test, the plan (pure).

``autotune track`` (:mod:`autotune.run.track`) keeps the rig on the condition between guided
retunes (:func:`autotune.run.loop.run_guided_stage`). Everything it decides comes from this
module, which does no I/O:

- **The drift lock** (:class:`DriftLock`). A short check at the set-points in force measures
  the photon phase shift; with the slope, cubic and phase at the peak stored by the last
  calibration or retune (:class:`autotune.analysis.guided.LockPrior`) its phase error gives the
  set-point's offset from the peak, ``D`` (:func:`autotune.analysis.guided.detuning_offset`), so the
  check measures the peak's detuning set-point ``y = d - D`` with variance ``R``. A two-state
  Kalman filter (R. E. Kalman, J. Basic Eng. 82, 35 (1960)) follows that peak and its drift
  rate: the peak ``p`` performs a random walk on top of a rate ``r`` that itself wanders
  slowly (docs/physics.md section 4: a slow ramp plus a random walk). After each check the
  detuning set-point is moved to the filter's prediction of the peak at the middle of the
  coming interval. The gain is the filter's, bounded by ``max_gain`` (the Joseph form keeps the
  covariance right for any gain), and a correction is bounded by ``max_correction_hz`` and the
  rig's steps.
- **When the lock cannot follow** (:class:`SequentialTest`). The filter's standardised
  innovations ``z = (y - p^-) / sqrt(P^- + R)`` are independent standard normals while the
  model holds (a property of the optimal filter; suboptimal gains keep them close). A step of
  the cavity (a thermal event) shifts their mean. Page's two-sided CUSUM (E. S. Page,
  Biometrika 41, 100 (1954)), ``S+ = max(0, S+ + z - k)`` and ``S- = max(0, S- - z - k)``, raises
  the alarm when either exceeds ``h``; a third, one-sided CUSUM watches the inversion for a drop
  of ``inversion_drop`` of its reference (the phase lock is blind to a lost velocity or fringe
  contrast). The reference ``k`` is half the design shift, the shift in detuning that would take
  the inversion below the floor (``1 - cos(eps / 2)`` of docs/physics.md section 5b's phase error
  ``eps``, see :mod:`autotune.analysis.guided`); ``h`` is set by the mean time between false alarms the
  user asks for, through Siegmund's approximation of the average run length (:func:`cusum_arl`).
  The checks' variances are the pooled ones of the measurements so far (:class:`NoiseModel`): a
  fringe's own delta-method error is itself noisy at a few atoms per phase. The inversion's
  reference is the precision-weighted mean of the last stage's measurement and the checks since
  (kept by the shell), so that the verification's own error does not bias every check alike
  (a self-starting chart: D. M. Hawkins, The Statistician 36, 299 (1987), from memory).
  When a statistic rises above a warning level ``w`` the next check follows at once instead of
  after the interval (variable sampling intervals: M. R. Reynolds Jr., R. W. Amin, J. C. Arnold
  and J. A. Nachlas, Technometrics 30, 181 (1988), from memory), so a step is confirmed within
  a few check durations.
- **The plan** (:func:`plan_checks`, called through :func:`plan_night`). The interval between
  checks, their shots and the warning level are chosen from the measured noise (the phase and
  inversion variance per shot of the checks so far), the stored slope and the drift filter's
  state, given the share of beam time the checks may take: the cadence that minimises the
  expected time to confirm a thermal step (``step_hz``, 15 kHz by default, docs/physics.md
  section 6), among those whose shots per check reach the least readable size and whose
  tracking error between checks stays below a third of the design shift. Many small checks
  beat a few large ones because a statistic above the warning level brings the next check at
  once: the step waits about half an interval for its first check, and the checks that
  confirm it come back to back. The warning level sets how often that first check is enough
  (:func:`flag_probability`) and how many in-control checks are followed by a recheck
  (:func:`in_control_rechecks`), both from the Brook-Evans Markov chain of the CUSUM
  (D. Brook and D. A. Evans, Biometrika 59, 539 (1972)); the rechecks' beam is counted in the
  share, and the false-alarm design in rig time counts their shorter gaps.

- **The beam budget** (:class:`BeamBudget`, :func:`checks_share`, :func:`choose_recovery`).
  ``HoldSettings.budget_fraction`` of the night's planned rig time is a ceiling on holding
  (checks, retunes, calibrations), counted as the night goes; every action is paid for at its
  largest size before it begins. A recovery the rest cannot pay for at its planned size becomes
  a smaller stage, a correction of the detuning to the checks' estimate of the peak, or
  nothing, and the rig time so left unheld is counted (:class:`Unheld`).
- **The checks sized to the signal** (:class:`SignalModel`): detected atoms per shot, the two
  contrasts and the fits' dispersion predict the phase variance per shot and the least check
  the lock can read, so a poor detector gets larger checks that can still tell a step from
  noise.

Everything is a deterministic function of its inputs, so a resumed night rebuilds the same
decisions from the journal's snapshots.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, fields, replace
from typing import Any

import numpy as np
from scipy import optimize, special

from autotune.analysis.guided import LockPrior, LockSettings, detuning_offset, phase_signal_note
from autotune.analysis.search import PointResult

__all__ = [
    "SIEGMUND_CORRECTION",
    "cusum_arl",
    "two_sided_arl",
    "cusum_threshold",
    "SequentialTest",
    "DriftLock",
    "HoldSettings",
    "NoiseModel",
    "CheckPlan",
    "plan_checks",
    "readable_z",
    "recheck_run_limit",
    "next_check",
    "floor_shift_hz",
    "known_cubic",
    "Assessment",
    "assess_check",
    "peak_after_change",
    "SignalModel",
    "OPEN_NIGHT_HORIZON_S",
    "BeamBudget",
    "least_check_s",
    "checks_reserve_s",
    "checks_share",
    "expected_stage_beam_s",
    "plan_night",
    "unwatched_until",
    "StageSize",
    "RecoveryChoice",
    "choose_recovery",
    "Unheld",
    "noise_row",
    "reference_add",
    "reference_value",
    "lock_before_change",
    "recovery_start",
]

#: Siegmund's correction of the CUSUM threshold for the overshoot of a Gaussian random walk:
#: ``b = h + 2 * 0.583`` (D. Siegmund, Sequential Analysis, Springer 1985; from memory).
SIEGMUND_CORRECTION = 1.166

_TWO_PI = 2.0 * math.pi
# The drift rate itself wanders: 0.2 Hz/s per square root of an hour (a ramp of 0.7 kHz/h
# that may change by that much over an hour). Only its order matters: it keeps the filter
# from freezing its rate estimate over a long night.
_RATE_WALK_HZ_PER_S_PER_SQRT_S = 0.2 / 60.0
# Shortest interval the planner considers (s) and the number of candidate intervals.
_MIN_INTERVAL_S = 30.0
_CANDIDATES = 40
# Riccati iterations for the filter's steady state in the planner.
_RICCATI_STEPS = 400
# Shifts the planner averages the expected delay over (log-spaced, design to capture range).
_SHIFTS = 8
# Cells of the Brook-Evans chains of the planner (the run lengths to about 1 %), and the
# warning levels it chooses among (fractions of each threshold).
_CHAIN_CELLS = 40
_WARNING_FRACTIONS = (0.15, 0.25, 0.35, 0.5)
# Standard deviations of room a check must leave for the lock to read it (one-sided 0.5 %:
# scipy.stats.norm.isf(0.005)); a check read as unusable twice raises an alarm.
_USABLE_Z = 2.576
# One-sided 5 % (scipy.stats.norm.isf(0.05)): the least room of a check, however rare the checks.
_LEAST_USABLE_Z = 1.645
# Least ratio of the design shift to the innovation's standard deviation of a check that can
# tell a step from noise (the test's k at least a half).
_MIN_DESIGN_SNR = 1.0
# Rig time of the prior of the night's rate of steps and recoveries: one per four hours,
# counted as one more recovery (s).
_RECOVERY_PRIOR_S = 4 * 3600.0


def _finite(value: Any) -> bool:
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
    if not (_finite(reference) and reference >= 0.0):
        raise ValueError(f"reference: expected a finite number >= 0, got {reference!r}")
    if not (_finite(in_control_arl) and in_control_arl >= 1.0):
        raise ValueError(f"in_control_arl: expected a finite number >= 1, got {in_control_arl!r}")
    target = math.log(in_control_arl)
    if math.log(cusum_arl(0.0, reference, 0.0)) >= target:
        return 0.0
    high = 1.0
    while math.log(cusum_arl(0.0, reference, high)) < target:
        high *= 2.0
        if high > 1e4:
            raise ValueError(f"in_control_arl {in_control_arl!r} out of reach")
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
            if not _finite(value):
                raise ValueError(f"{name}: expected a finite number, got {value!r}")
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
        qr = _RATE_WALK_HZ_PER_S_PER_SQRT_S**2
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
               max_gain: float = 1.0) -> tuple[DriftLock, Innovation]:
        """Tell the lock one measured peak (Hz, with its variance) at ``clock_s``.

        The Kalman gain of the peak is bounded by ``max_gain`` (both gains scaled alike); the
        covariance is updated in Joseph form, right for any gain.
        """
        if not (_finite(peak_hz) and _finite(variance_hz2) and variance_hz2 > 0.0):
            raise ValueError(f"peak_hz, variance_hz2: expected finite numbers (variance > 0), "
                             f"got {peak_hz!r}, {variance_hz2!r}")
        prior = self.predict(clock_s)
        cov = prior._cov
        innovation = float(peak_hz) - prior.peak_hz
        s = float(cov[0, 0] + variance_hz2)
        gain = cov[:, 0] / s
        if gain[0] > max_gain:
            gain = gain * (max_gain / gain[0])
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
# Settings and noise
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


def floor_shift_hz(floor: float, slope_rad_per_hz: float) -> float:
    """The detuning error whose phase error alone takes the inversion to ``floor`` of the best (Hz).

    With ``|a| = 1`` the inversion is ``cos(eps / 2)`` of the best (docs/physics.md section 3, see
    :mod:`autotune.analysis.guided`), so ``eps = 2 acos(floor)`` and the shift is ``eps / |slope|``.
    """
    return 2.0 * math.acos(float(floor)) / abs(float(slope_rad_per_hz))


@dataclass(frozen=True)
class NoiseModel:
    """Variance per shot of a check's phase shift and inversion, measured.

    A fringe pair's estimates have variances that scale as one over the shots (binomial
    counts; common practice), so ``phase_variance_shots = stderr^2 * shots`` is a property of
    the rig at its set-points; the median over the measurements so far is robust to one odd
    fringe.

    Attributes
    ----------
    phase_variance_shots : float
        rad^2 times shots.
    inversion_variance_shots : float
        Inversion variance times shots.
    measurements : int
        How many measurements it comes from.
    """

    phase_variance_shots: float
    inversion_variance_shots: float
    measurements: int

    @classmethod
    def from_estimates(cls, rows: Sequence[tuple[float, float, int]]) -> NoiseModel:
        """From ``(phase_stderr_rad, inversion_stderr, shots)`` of measurements (at least one)."""
        usable = [(p, i, n) for p, i, n in rows if n > 0 and _finite(p) and _finite(i) and p > 0]
        if not usable:
            raise ValueError("NoiseModel: expected at least one measurement with a phase stderr")
        return cls(float(np.median([p * p * n for p, _, n in usable])),
                   float(np.median([i * i * n for _, i, n in usable])), len(usable))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping."""
        return asdict(self)


@dataclass(frozen=True)
class SignalModel:
    """What one shot tells of the fringes at the held set-points, measured on this rig.

    A fringe ``P_g(phi) = a + (C / 2) cos(phi + chi)`` fitted by least squares to ``N``
    detected atoms spread evenly over the Ramsey phases, with the binomial variance
    ``p (1 - p) = 1/4 - (C^2 / 4) cos^2(phi + chi)`` (at ``a = 1/2``) weighted by the fit's
    projections across and along the fringe's direction, has
    ``Var chi = (2 - C^2 / 2) / (N C^2)`` and ``Var C = (2 - 3 C^2 / 2) / N`` (binomial least
    squares and the delta method; our derivation from docs/physics.md section 5, checked against
    seeded binomial draws in the tests). The photon phase shift is the difference of two fringes, one
    per field, each measured on half of a check's shots. Noise beyond the counts (phase
    noise of the rig, a fringe that is not quite sinusoidal) shows as a reduced chi-square
    above one; the variances are scaled by it (quasi-likelihood, common practice).

    The model is pooled over every detected atom of the measurements so far, so it is steady
    where a fringe's own delta-method error is not (a few atoms per phase on a poor detector).

    Attributes
    ----------
    detected_per_shot_empty, detected_per_shot_one_photon : float
        Detected atoms per shot of each field.
    contrast_empty, contrast_one_photon : float
        The fringes' contrasts (medians of the measurements).
    dispersion : float
        Median of the fits' reduced chi-squares, at least 1. A median, not the pooled ratio:
        one long fit whose fringe moved while it was measured (a stage's verification with the
        cavity drifting) can carry a reduced chi-square of 9 where the checks show none; pooled,
        it made a night plan its checks for four times the phase variance their own innovations
        showed (a mismatch night: ``z`` variance 1.1 against the measured variance).
    measurements : int
        How many measurements it comes from.
    """

    detected_per_shot_empty: float
    detected_per_shot_one_photon: float
    contrast_empty: float
    contrast_one_photon: float
    dispersion: float
    measurements: int

    @classmethod
    def from_rows(cls, rows: Sequence[Sequence[float]]) -> SignalModel | None:
        """From noise rows ``(phase_sd, inversion_sd, shots, detected_empty, detected_one_photon,
        contrast_empty, contrast_one_photon, chi2, dof)``; None without such rows.

        Rows of three numbers (journals written before the model) are skipped.
        """
        usable = [r for r in rows if len(r) >= 9 and int(r[2]) > 0
                  and all(_finite(x) for x in r[:9]) and float(r[5]) > 0.0]
        if not usable:
            return None
        shots_per_field = sum(0.5 * float(r[2]) for r in usable)
        reduced = [float(r[7]) / float(r[8]) for r in usable if float(r[8]) > 0]
        return cls(sum(float(r[3]) for r in usable) / shots_per_field,
                   sum(float(r[4]) for r in usable) / shots_per_field,
                   float(np.median([float(r[5]) for r in usable])),
                   float(np.median([max(float(r[6]), 0.0) for r in usable])),
                   max(float(np.median(reduced)), 1.0) if reduced else 1.0, len(usable))

    @staticmethod
    def _per_atom(contrast: float) -> tuple[float, float]:
        """``(Var chi, Var C)`` of one fringe times its detected atoms."""
        c = min(max(contrast, 1e-3), 1.0)
        return (2.0 - 0.5 * c * c) / (c * c), 2.0 - 1.5 * c * c

    @property
    def phase_variance_shots(self) -> float:
        """Variance of the photon phase shift times a check's shots (rad^2)."""
        total = 0.0
        for atoms, contrast in ((self.detected_per_shot_empty, self.contrast_empty),
                                (self.detected_per_shot_one_photon, self.contrast_one_photon)):
            # Each field gets half of the shots: Var = v / (n shots / 2).
            total += 2.0 * self._per_atom(contrast)[0] / max(atoms, 1e-9)
        return self.dispersion * total

    def contrast_margin_sd(self, shots: int, ratio: float) -> tuple[float, float]:
        """``C1 - ratio C0`` and its standard deviation for a check of ``shots`` shots."""
        half = max(0.5 * shots, 1e-9)
        var = self.dispersion * (
            self._per_atom(self.contrast_one_photon)[1]
            / max(self.detected_per_shot_one_photon * half, 1e-9)
            + ratio**2 * self._per_atom(self.contrast_empty)[1]
            / max(self.detected_per_shot_empty * half, 1e-9))
        return self.contrast_one_photon - ratio * self.contrast_empty, math.sqrt(var)

    def usable_shots(self, *, ratio: float, phase_margin_rad: float,
                     z: float = _USABLE_Z) -> int | None:
        """Fewest shots of a check whose phase the lock can read with ``z`` standard deviations
        of room: the one-photon contrast above ``ratio`` of the empty one, and the phase error
        at the design shift within the capture range (``phase_margin_rad`` of room).

        None when the rig's own contrasts leave no room at any size.
        """
        margin, _ = self.contrast_margin_sd(2, ratio)
        if margin <= 0.0 or phase_margin_rad <= 0.0:
            return None
        var_one = self.contrast_margin_sd(2, ratio)[1] ** 2  # one shot per field
        contrast_shots = 2.0 * z * z * var_one / margin**2
        phase_shots = z * z * self.phase_variance_shots / phase_margin_rad**2
        return int(math.ceil(max(contrast_shots, phase_shots)))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping."""
        return asdict(self)


# --------------------------------------------------------------------------------------------
# The plan of the checks
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CheckPlan:
    """The cadence and shots of the checks and the design of the sequential test.

    Attributes
    ----------
    interval_s : float
        Rig time from one check's start to the next (s).
    shots_per_phase : int
        Shots per field and Ramsey phase of a check.
    check_s : float
        Beam time of one check (s).
    check_share : float
        Share of beam time the checks take (``check_s / interval_s``).
    detuning_stderr_hz : float
        Standard error of one check's offset from the peak (Hz).
    design_shift_hz : float
        The shift the test is designed for (:func:`floor_shift_hz`).
    test : SequentialTest
        ``k``, ``h``, ``w`` of both statistics.
    expected_delay_s : float
        Expected rig time from a shift to its alarm, averaged over shifts from the design shift
        to the capture range of the phase (the planner's approximation).
    step_delay_s : float
        The same for a shift of ``step_hz`` (a thermal step).
    false_alarm_interval_h : float
        Mean rig time between false alarms of the three one-sided charts together (Siegmund).
    tracking_error_hz : float
        Predicted rms error of the held detuning between checks (Hz).
    reason : str
        The choice in one sentence, with its numbers.
    inputs : dict
        What it was computed from.
    """

    interval_s: float
    shots_per_phase: int
    check_s: float
    check_share: float
    detuning_stderr_hz: float
    design_shift_hz: float
    test: SequentialTest
    expected_delay_s: float
    step_delay_s: float
    false_alarm_interval_h: float
    tracking_error_hz: float
    reason: str
    inputs: dict[str, Any]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping (infinities as None)."""
        out: dict[str, Any] = {}
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, SequentialTest):
                out[f.name] = asdict(value)
            elif isinstance(value, float) and not math.isfinite(value):
                out[f.name] = None
            else:
                out[f.name] = value
        return out

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> CheckPlan:
        """Rebuild from :meth:`to_dict`."""
        values = dict(data)
        values["test"] = SequentialTest(**data["test"])
        for name in ("expected_delay_s", "step_delay_s", "false_alarm_interval_h"):
            if values.get(name) is None:
                values[name] = math.inf
        return cls(**values)


def _steady_peak_variance(interval_s: float, variance_hz2: float, lock: DriftLock,
                          max_gain: float) -> tuple[float, float]:
    """Steady-state (prior, posterior) variance of the peak for checks ``interval_s`` apart.

    The Riccati recursion of :meth:`DriftLock.predict` and :meth:`DriftLock.update` (the gain
    bounded, the Joseph form) written out for the 2 x 2 covariance.
    """
    tau, r = float(interval_s), float(variance_hz2)
    q = lock.walk_hz_per_sqrt_s**2
    qr = _RATE_WALK_HZ_PER_S_PER_SQRT_S**2
    (a, b), (_, c) = lock.covariance
    prior = posterior = a
    for _ in range(_RICCATI_STEPS):
        pa = a + 2.0 * tau * b + tau * tau * c + q * tau + qr * tau**3 / 3.0
        pb = b + tau * c + qr * tau**2 / 2.0
        pc = c + qr * tau
        s = pa + r
        g0, g1 = pa / s, pb / s
        if g0 > max_gain:
            g0, g1 = max_gain, g1 * max_gain / g0
        a = (1.0 - g0) ** 2 * pa + r * g0 * g0
        b = (1.0 - g0) * (pb - g1 * pa) + r * g0 * g1
        c = g1 * g1 * pa - 2.0 * g1 * pb + pc + r * g1 * g1
        prior = pa
        if abs(a - posterior) <= 1e-9 * max(posterior, 1.0):
            posterior = a
            break
        posterior = a
    return prior, posterior


def _chain(shift: float, reference: float, threshold: float, cells: int = _CHAIN_CELLS
           ) -> tuple[np.ndarray, np.ndarray]:
    """A one-sided CUSUM as a Markov chain (D. Brook and D. A. Evans, Biometrika 59, 539 (1972)).

    The statistic ``S`` on ``[0, h]`` is cut into ``cells`` cells, the first holding 0, of width
    ``2 h / (2 cells - 1)``; a step ``S' = max(0, S + z - k)`` with ``z ~ N(shift, 1)`` moves
    between their centres. Returns the centres and the transition matrix among them (its rows
    sum to less than one by the probability of the alarm, ``S' > h``).
    """
    h = max(float(threshold), 1e-6)
    width = 2.0 * h / (2 * cells - 1)
    centres = width * np.arange(cells)
    upper = centres[None, :] + 0.5 * width - centres[:, None] + reference - shift
    cdf = special.ndtr(upper)
    moves = np.diff(cdf, axis=1, prepend=0.0)  # the cell of 0 takes every step that ends below
    return centres, moves


@functools.lru_cache(maxsize=4096)
def _stationary(reference: float, threshold: float, cells: int) -> tuple[np.ndarray, np.ndarray]:
    """Centres and in-control stationary distribution of the chain of :func:`_chain`, an alarm
    restarting the chart at 0 (a renewal)."""
    centres, moves = _chain(0.0, reference, threshold, cells)
    renewal = moves.copy()
    renewal[:, 0] += 1.0 - moves.sum(axis=1)
    # pi (Q - I) = 0 with sum(pi) = 1: one equation replaced by the normalisation.
    system = (renewal - np.eye(cells)).T
    system[0, :] = 1.0
    rhs = np.zeros(cells)
    rhs[0] = 1.0
    return centres, np.linalg.solve(system, rhs)


def in_control_rechecks(reference: float, threshold: float, warning: float,
                        cells: int = _CHAIN_CELLS) -> float:
    """Long-run share of a one-sided chart's in-control checks that leave it at or above the
    warning level without an alarm (each followed at once by a recheck).

    The stationary distribution of the Brook-Evans chain (:func:`_chain`, an alarm restarting
    the chart at 0), carried one step on exactly: ``P(w <= S' <= h)`` for the normal step from
    each cell.
    """
    centres, stationary = _stationary(float(reference), float(threshold), int(cells))
    above = special.ndtr(threshold - centres + reference) - \
        special.ndtr(warning - centres + reference)
    return float(np.clip(stationary @ np.maximum(above, 0.0), 0.0, 1.0))


def flag_probability(shift: float, reference: float, threshold: float, warning: float,
                     cells: int = _CHAIN_CELLS) -> float:
    """Probability that the first check after a shift of ``shift`` standard deviations leaves
    the chart at or above its warning level (a recheck at once, or the alarm), the chart being
    in its in-control stationary state before (:func:`in_control_rechecks`' chain; the step
    itself exact: ``P(S + z - k >= w)``, ``z ~ N(shift, 1)``)."""
    centres, stationary = _stationary(float(reference), float(threshold), int(cells))
    flagged = special.ndtr(centres - warning - reference + shift)
    return float(np.clip(stationary @ flagged, 0.0, 1.0))


def _delay(shift_sd: float, reference: float, threshold: float, warning: float,
           interval_s: float, check_s: float, *, late: bool = False,
           flag: float | None = None) -> float:
    """Expected rig time from a shift of ``shift_sd`` standard deviations to the alarm.

    Checks come an interval apart until one leaves the statistic at or above the warning
    level, which happens at each with the probability of :func:`flag_probability` (``flag``
    when known; the step lands uniformly within an interval: half an interval to the first
    check, a whole one when ``late``); from there checks follow back to back, Siegmund's run
    length of them (:func:`cusum_arl`) each a check's duration.
    """
    if shift_sd - reference <= 0.0:
        return math.inf
    if flag is None:
        flag = flag_probability(shift_sd, reference, threshold, warning)
    if flag <= 1e-9:
        return math.inf
    run_length = max(1.0, cusum_arl(shift_sd, reference, threshold))
    first = 1.0 if late else 0.5
    return interval_s * (first + (1.0 - flag) / flag) + run_length * check_s


def _check_row(settings: HoldSettings, *, interval: float, per_phase: int, phase_var: float,
               slope: float, design: float, shifts: np.ndarray, step_hz: float,
               noise: NoiseModel, lock: DriftLock, reference_inversion: float,
               reference_stderr: float, warning_fraction: float,
               steady: dict[tuple[float, int], tuple[float, float]]) -> dict[str, Any]:
    """The numbers of checks of ``per_phase`` shots every ``interval`` s, warning level
    ``warning_fraction`` of each threshold (``steady`` caches the filter's steady state)."""
    phases = settings.ramsey_phases
    shots = 2 * phases * per_phase
    check_s = shots / settings.repetition_rate_hz
    detuning_var = phase_var / shots / slope**2
    key = (interval, per_phase)
    if key not in steady:
        steady[key] = _steady_peak_variance(interval, detuning_var, lock, settings.max_gain)
    p_prior, p_post = steady[key]
    innovation_sd = math.sqrt(p_prior + detuning_var)
    k = 0.5 * design / innovation_sd
    inv_sd = math.sqrt(noise.inversion_variance_shots / shots + reference_stderr**2)
    k_inv = 0.5 * settings.inversion_drop * reference_inversion / inv_sd
    # The charts' in-control run lengths are in checks, rechecks included: the mean rig time
    # per check is the interval, shortened by the share of checks that are rechecks (back to
    # back). Two passes: the rechecks depend on the thresholds they help set.
    gap = interval
    recheck = 0.0
    for _ in range(2):
        checks_between_false_alarms = max(settings.false_alarm_interval_s / gap, 1.0)
        h = cusum_threshold(k, 3.0 * checks_between_false_alarms)
        h_inv = cusum_threshold(k_inv, 3.0 * checks_between_false_alarms)
        recheck = min(2.0 * in_control_rechecks(k, h, warning_fraction * h)
                      + in_control_rechecks(k_inv, h_inv, warning_fraction * h_inv), 0.9)
        gap = (1.0 - recheck) * interval + recheck * check_s
    rate_sd = lock.rate_stderr_hz_per_s
    tracking = math.sqrt(p_post + settings.walk_hz_per_sqrt_s**2 * interval / 2.0
                         + (rate_sd * interval) ** 2 / 3.0
                         + (lock.rate_hz_per_s * interval) ** 2 / 12.0)
    arl = 1.0 / (2.0 / cusum_arl(0.0, k, h) + 1.0 / cusum_arl(0.0, k_inv, h_inv))
    w, w_inv = warning_fraction * h, warning_fraction * h_inv
    step_sd = step_hz / innovation_sd
    flag = flag_probability(step_sd, k, h, w) if step_sd > k else 0.0
    return {"interval_s": interval, "shots_per_phase": per_phase, "check_s": check_s,
            "detuning_stderr_hz": math.sqrt(detuning_var),
            "test": SequentialTest(k, h, w, k_inv, h_inv, w_inv),
            "shifts": shifts, "recheck_share": recheck, "mean_gap_s": gap,
            "step_delay_s": _delay(step_sd, k, h, w, interval, check_s, flag=flag),
            "step_delay_late_s": _delay(step_sd, k, h, w, interval, check_s, late=True,
                                        flag=flag),
            "step_flag": flag,
            "false_alarm_interval_h": arl * gap / 3600.0, "tracking_error_hz": tracking,
            "innovation_sd_hz": innovation_sd, "design_snr": design / innovation_sd}


def _expected_delay(row: Mapping[str, Any]) -> float:
    """The mean expected delay over the row's shifts (design shift to capture range)."""
    t = row["test"]
    return float(np.mean([_delay(x / row["innovation_sd_hz"], t.reference, t.threshold,
                                 t.warning, row["interval_s"], row["check_s"])
                          for x in row["shifts"]]))


def readable_z(settings: HoldSettings, interval_s: float) -> float:
    """Standard deviations of room a check every ``interval_s`` leaves for the lock to read it.

    A check the lock cannot read is repeated at once, and a second one in a row raises the alarm
    (:func:`assess_check`): by chance, that happens with the square of the probability ``p`` of
    one. The room is set so that this pair is no more frequent than each of the three charts'
    false alarms, an in-control run length of three times ``false_alarm_interval_s`` over the
    interval in checks: ``p = (3 N)^(-1/2)``, one-sided, and never less room than a one-sided
    5 % (``z`` at least 1.645) nor more than :data:`_USABLE_Z`. Many checks a night need more
    room each than a few.
    """
    checks = max(float(settings.false_alarm_interval_s) / max(float(interval_s), 1.0), 1.0)
    z = float(special.ndtri(1.0 - 1.0 / math.sqrt(3.0 * checks)))
    return min(max(z, _LEAST_USABLE_Z), _USABLE_Z)


def plan_checks(settings: HoldSettings, *, noise: NoiseModel, prior: LockPrior, lock: DriftLock,
                reference_inversion: float, reference_stderr: float, check_share: float,
                step_hz: float = 15e3, signal: SignalModel | None = None,
                step_rate_per_s: float = 1.0 / _RECOVERY_PRIOR_S) -> CheckPlan:
    """Choose the interval and shots of the checks and design the sequential test.

    Parameters
    ----------
    settings : HoldSettings
    noise : NoiseModel
        Measured phase and inversion variance per shot (the fringes' own errors).
    prior : LockPrior
        The stored phase curve (its slope sets the detuning noise and the design shift).
    lock : DriftLock
        The drift filter now (rate and its uncertainty enter the tracking error).
    reference_inversion, reference_stderr : float
        The inversion the watch compares with, and its standard error.
    check_share : float
        Share of beam time the checks may take (at most what the budget has left,
        :func:`checks_share`).
    step_hz : float
        A second shift whose time to confirm is planned and stated (a thermal step, Hz).
    signal : SignalModel, optional
        This rig's information per shot (detected atoms, contrasts, dispersion): the phase
        variance per shot is the larger of its prediction and ``noise``'s, and a check is at
        least large enough for the lock to read it (:meth:`SignalModel.usable_shots`, with the
        room of :func:`readable_z`).
    step_rate_per_s : float
        Steps expected per second of rig time (the night's own rate of recoveries,
        :func:`checks_share`); weighs the steps' delay against the tracking error when no
        cadence meets the tracking bound.

    Notes
    -----
    For each candidate interval ``T`` (log-spaced from 30 s to ``max_interval_s``) and warning
    level ``w`` (a fraction of each threshold, :data:`_WARNING_FRACTIONS`) the checks get the
    largest size whose beam, rechecks included, is ``check_share`` of the rig time: a share
    ``r`` of the checks are rechecks (in control, :func:`in_control_rechecks` of the two phase
    charts and the inversion chart), so the mean gap between checks is
    ``(1 - r) T + r check_s`` and a check may take ``check_share`` of it. Shots per phase below
    the least size (the larger of ``min_shots_per_phase`` and what the signal needs to be read)
    rule the candidate out, above ``max_shots_per_phase`` they are capped, and so does a check
    that cannot tell a step from noise: the design shift below one standard deviation of the
    innovation (``k < 1/2``). The test's ``k`` is half the design shift in units of the
    innovation's standard deviation (Page's choice for a known shift), ``h`` gives each of the
    three one-sided charts an in-control run length (Siegmund) of three times
    ``false_alarm_interval_s`` over the mean gap (their rates add). Among the candidates whose
    predicted tracking error stays below a third of the design shift, the least expected time
    to confirm a ``step_hz`` shift wins (:func:`_delay`; ties to the longer interval). When none
    qualifies, the least expected share of the night lost wins: ``2 Q(design / tracking error)``
    (a normal tracking error beyond the design shift) plus ``step_rate_per_s`` times the time to
    confirm a step (the smallest tracking error alone left the checks 20-27 min apart on poor
    signals, and the steps as long unconfirmed). When no candidate affords a readable check,
    the checks are made large enough to tell a step from noise and spaced further
    apart until they fit the share (fewer but larger checks).
    """
    if not (0.0 < check_share <= 1.0):
        raise ValueError(f"check_share: expected a number in (0, 1], got {check_share!r}")
    slope = abs(prior.slope_rad_per_hz)
    design = floor_shift_hz(settings.floor, prior.slope_rad_per_hz)
    capture = settings.lock.capture_phase_error_rad / slope
    shifts = np.geomspace(design, max(capture, design), _SHIFTS)
    rate = settings.repetition_rate_hz
    phases = settings.ramsey_phases
    phase_var = noise.phase_variance_shots
    if signal is not None:
        phase_var = max(phase_var, signal.phase_variance_shots)

    @functools.cache
    def least_at(interval: float) -> int:
        """The least shots per phase of a check every ``interval``: the configured least, and
        what the lock needs to read it (:func:`readable_z` of the interval)."""
        least = settings.min_shots_per_phase
        if signal is not None:
            readable = signal.usable_shots(
                ratio=settings.lock.min_contrast_ratio,
                phase_margin_rad=settings.lock.capture_phase_error_rad - design * slope,
                z=readable_z(settings, interval))
            if readable is not None:
                least = max(least, math.ceil(readable / (2 * phases)))
        return min(least, settings.max_shots_per_phase)
    steady: dict[tuple[float, int], tuple[float, float]] = {}
    common = {"phase_var": phase_var, "slope": slope, "design": design, "shifts": shifts,
              "step_hz": step_hz, "noise": noise, "lock": lock,
              "reference_inversion": reference_inversion, "reference_stderr": reference_stderr,
              "steady": steady}

    def sized(interval: float, fraction: float) -> dict[str, Any] | None:
        """Checks every ``interval`` as large as the share pays for, rechecks included."""
        per_phase = int(math.floor(check_share * interval * rate / (2 * phases)))
        least = least_at(interval)
        row = None
        for _ in range(4):
            if per_phase < least:
                return None
            per_phase = min(per_phase, settings.max_shots_per_phase)
            row = _check_row(settings, interval=interval, per_phase=per_phase,
                             warning_fraction=fraction, **common)
            if row["check_s"] / row["mean_gap_s"] <= check_share * (1.0 + 1e-9):
                return row
            per_phase = min(per_phase - 1, math.floor(
                check_share * row["mean_gap_s"] * rate / (2 * phases)))
        return None

    best: tuple[float, float, dict[str, Any]] | None = None
    fallback: tuple[float, dict[str, Any]] | None = None
    top = max(settings.max_interval_s, _MIN_INTERVAL_S)
    for interval in np.geomspace(_MIN_INTERVAL_S, top, _CANDIDATES):
        interval = float(interval)
        if math.floor(check_share * interval * rate / (2 * phases)) < least_at(interval):
            continue
        for fraction in _WARNING_FRACTIONS:
            row = sized(interval, fraction)
            if row is None or row["design_snr"] < _MIN_DESIGN_SNR:
                continue
            tracking = row["tracking_error_hz"]
            # The expected share of the night lost: the tracking error beyond the design shift
            # (a normal error: 2 Q(design / error)) and the steps' delays at the night's rate.
            lost = 2.0 * special.ndtr(-design / max(tracking, 1e-9)) + \
                step_rate_per_s * row["step_delay_s"]
            if fallback is None or lost < fallback[0]:
                fallback = (lost, row)
            if tracking > design / 3.0:
                continue
            delay = row["step_delay_s"]
            if best is None or delay < best[0] - 1e-6 or (abs(delay - best[0]) <= 1e-6
                                                          and interval > best[1]):
                best = (delay, interval, row)
    inputs = {"phase_variance_shots": phase_var,
              "measured_phase_variance_shots": noise.phase_variance_shots,
              "signal": None if signal is None else signal.to_dict(),
              "readable_shots_per_phase": least_at(float(top)),
              "inversion_variance_shots": noise.inversion_variance_shots,
              "noise_measurements": noise.measurements, "slope_rad_per_hz": prior.slope_rad_per_hz,
              "rate_hz_per_s": lock.rate_hz_per_s, "rate_stderr_hz_per_s": lock.rate_stderr_hz_per_s,
              "walk_hz_per_sqrt_s": settings.walk_hz_per_sqrt_s, "check_share": check_share,
              "reference_inversion": reference_inversion, "reference_stderr": reference_stderr,
              "floor": settings.floor, "step_hz": step_hz}
    if best is not None:
        row = best[2]
        why = (f"the least expected time to confirm a {step_hz / 1e3:.0f} kHz step, among the "
               f"cadences and warning levels whose tracking error stays below a third of the "
               f"{design / 1e3:.1f} kHz design shift (the detuning error that takes the inversion "
               f"to {settings.floor:.2f} of the best)")
    elif fallback is not None:
        row = fallback[1]
        why = (f"no interval keeps the tracking error below a third of the {design / 1e3:.1f} kHz "
               f"design shift within the budget: the least expected share of the night lost, "
               f"{fallback[0]:.1%} (the tracking error beyond the design shift, and "
               f"{step_rate_per_s * 3600:.2f} steps per hour each unheld for its time to confirm)")
    else:
        # Fewer but larger checks: the least size that reads the phase and tells the design
        # shift from the noise of one check (twice the bare need: the filter's own
        # uncertainty adds to the innovation), spaced to fit the share.
        tell = phase_var / (slope * design / _MIN_DESIGN_SNR) ** 2 * 2.0
        least = least_at(float(top))
        per_phase = min(max(least, int(math.ceil(tell / (2 * phases)))),
                        settings.max_shots_per_phase)
        check_s = 2 * phases * per_phase / rate
        row = _check_row(settings, interval=check_s / check_share, per_phase=per_phase,
                         warning_fraction=_WARNING_FRACTIONS[-1], **common)
        why = (f"no interval up to {settings.max_interval_s:g} s affords, within the share, a check "
               f"of {least} shots per phase that the lock reads and that tells the design shift "
               f"from noise: fewer but larger checks")
    test = row["test"]
    row["expected_delay_s"] = _expected_delay(row)
    for name in ("innovation_sd_hz", "design_snr", "recheck_share", "mean_gap_s",
                 "step_delay_late_s", "step_flag"):
        inputs[name] = row[name]
    share = row["check_s"] / row["mean_gap_s"]
    reason = (f"a check of {row['shots_per_phase']} shots per phase ({row['check_s']:.0f} s of beam, "
              f"{row['detuning_stderr_hz'] / 1e3:.2f} kHz on the peak, the design shift "
              f"{inputs['design_snr']:.1f} sd of the innovation) every "
              f"{row['interval_s'] / 60:.1f} min of rig time, checked again at once above the "
              f"warning level ({row['recheck_share']:.0%} of the checks in a quiet night; "
              f"{share:.1%} of the beam in all): {why}; test k {test.reference:.2f}, "
              f"h {test.threshold:.2f}, w {test.warning:.2f} (false alarms every "
              f"{row['false_alarm_interval_h']:.0f} h, Siegmund); a {step_hz / 1e3:.0f} kHz step "
              f"is confirmed {row['step_delay_s'] / 60:.1f} min after it in the mean, "
              f"{row['step_delay_late_s'] / 60:.1f} min when it comes just after a check (its "
              f"first check passes the warning level with probability {row['step_flag']:.2f}; "
              f"Brook-Evans chain), a shift at the design {row['expected_delay_s'] / 60:.1f} min "
              f"(mean over the shifts to the capture range)")
    return CheckPlan(interval_s=row["interval_s"], shots_per_phase=row["shots_per_phase"],
                     check_s=row["check_s"], check_share=share,
                     detuning_stderr_hz=row["detuning_stderr_hz"], design_shift_hz=design,
                     test=test, expected_delay_s=row["expected_delay_s"],
                     step_delay_s=row["step_delay_s"],
                     false_alarm_interval_h=row["false_alarm_interval_h"],
                     tracking_error_hz=row["tracking_error_hz"], reason=reason, inputs=inputs)


# --------------------------------------------------------------------------------------------
# One check
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Assessment:
    """What one check says and what to do about it.

    Attributes
    ----------
    usable : bool
        Whether the phase signal could steer the detuning (else ``note`` says why).
    note : str
        Why not usable, or empty.
    offset_hz, offset_stderr_hz : float
        The held set-point minus the peak (Hz; nan when not usable).
    peak_hz, peak_variance_hz2 : float
        The measured peak ``y = d - D`` and its variance.
    innovation : Innovation or None
    lock : DriftLock
        The lock after this check (unchanged when not usable).
    upper, lower, inversion : float
        The CUSUM statistics after this check.
    inversion_z : float
        The inversion's standardised drop below its reference.
    action : str
        ``"alarm"``, ``"recheck"``, ``"correct"`` or ``"hold"``.
    alarm : str or None
        ``"out_of_range"``, ``"upper"``, ``"lower"`` or ``"inversion"``.
    target_detuning_hz : float
        The detuning set-point to hold next (the present one unless ``action`` corrects).
    reason : str
        One sentence with the numbers.
    """

    usable: bool
    note: str
    offset_hz: float
    offset_stderr_hz: float
    peak_hz: float
    peak_variance_hz2: float
    innovation: Innovation | None
    lock: DriftLock
    upper: float
    lower: float
    inversion: float
    inversion_z: float
    action: str
    alarm: str | None
    target_detuning_hz: float
    reason: str

    def numbers(self) -> dict[str, Any]:
        """JSON-ready numbers for the journal (nan as None)."""
        def clean(value: Any) -> Any:
            return None if isinstance(value, float) and not math.isfinite(value) else value

        out = {f.name: clean(getattr(self, f.name)) for f in fields(self)
               if f.name not in ("innovation", "lock")}
        out["innovation"] = None if self.innovation is None else \
            {k: clean(v) for k, v in asdict(self.innovation).items()}
        out["lock"] = self.lock.to_dict()
        return out


def assess_check(settings: HoldSettings, *, result: PointResult, detuning_hz: float,
                 lock: DriftLock, prior: LockPrior, plan: CheckPlan, upper: float, lower: float,
                 inversion: float, reference_inversion: float, reference_stderr: float,
                 next_interval_s: float, noise: NoiseModel | None = None,
                 previous_unusable: bool = False,
                 limits: tuple[float, float] | None = None) -> Assessment:
    """Assess one check at the held detuning ``detuning_hz``: update the lock and the test, decide.

    Order of the decision: a check whose phase signal is unusable is checked again at once, and
    raises the alarm when the repeat is unusable too (out of the capture range, or a contrast
    too low: the lock cannot read it; one cheap check alone may be unusable by chance); else the
    lock is told the measured
    peak, the statistics take their step, and an alarm (a statistic above its threshold) comes
    first, then a recheck (above the warning level: the next check at once), then a correction
    (the lock's prediction of the peak at the middle of the coming interval, bounded by
    ``max_correction_hz`` and ``limits``, applied when at least ``min_correction_hz``).

    Parameters
    ----------
    result : PointResult
        The check's estimate (``clock_s`` is its middle on the rig clock).
    next_interval_s : float
        Rig time until the next check (the plan's interval): the correction aims at the middle.
    noise : NoiseModel, optional
        The pooled noise of the measurements so far: the check's phase and inversion variances
        are taken from it at the check's shots (a fringe's own delta-method error is itself
        noisy at a few atoms per phase, and an underestimate would inflate the statistic);
        without it, the check's own standard errors.
    previous_unusable : bool
        Whether the check before this one was unusable (this one is its repeat).
    limits : (float, float), optional
        The detuning's effective limits (Hz).
    """
    test = plan.test
    clock = float(result.clock_s if result.clock_s is not None else lock.clock_s)
    error = float(np.mod(result.phase_shift - prior.phase_at_peak_rad + math.pi, _TWO_PI) - math.pi)
    note = phase_signal_note(result, settings.lock, prior.phase_at_peak_rad)
    phase_sd, inversion_sd = result.phase_shift_stderr, result.inversion_stderr
    if noise is not None and result.shots > 0:
        phase_sd = math.sqrt(noise.phase_variance_shots / result.shots)
        inversion_sd = math.sqrt(noise.inversion_variance_shots / result.shots)
    inv_sd = math.sqrt(inversion_sd**2 + reference_stderr**2)
    inversion_z = (reference_inversion - result.inversion) / inv_sd if inv_sd > 0 else 0.0
    inversion_stat = max(0.0, inversion + inversion_z - test.inversion_reference)
    if note is not None:
        if not previous_unusable:
            return Assessment(False, note, math.nan, math.nan, math.nan, math.nan, None, lock,
                              upper, lower, inversion_stat, inversion_z, "recheck", None,
                              detuning_hz, f"check unusable for the lock ({note}): check again "
                                           f"at once")
        return Assessment(False, note, math.nan, math.nan, math.nan, math.nan, None, lock, upper,
                          lower, inversion_stat, inversion_z, "alarm", "out_of_range",
                          detuning_hz, f"check unusable for the lock again ({note}): the lock "
                                       f"cannot follow; retune")
    # The check's own noise only: the stored curve's uncertainty (slope, cubic) is the same at
    # every check, a bias of the peak's scale, not noise; counted as noise it would make a large
    # phase error look insignificant (the offset's error grows as D^3) and hide a step.
    offset, offset_sd = detuning_offset(error, phase_sd, prior.slope_rad_per_hz,
                                        0.0, known_cubic(prior), 0.0)
    peak = detuning_hz - offset
    variance = max(offset_sd**2, 1.0)
    updated, innovation = lock.update(clock, peak, variance, max_gain=settings.max_gain)
    new_upper, new_lower = SequentialTest.step(upper, lower, innovation.z, test.reference)
    numbers = (f"phase error {error / math.pi:+.3f} +- {phase_sd / math.pi:.3f} pi: "
               f"set-point {offset / 1e3:+.2f} +- {offset_sd / 1e3:.2f} kHz from the peak; "
               f"innovation {innovation.value_hz / 1e3:+.2f} kHz (z {innovation.z:+.2f}); "
               f"statistics S+ {new_upper:.2f}, S- {new_lower:.2f} (h {test.threshold:.2f}), "
               f"inversion {result.inversion:.3f} vs {reference_inversion:.3f} "
               f"(S {inversion_stat:.2f}, h {test.inversion_threshold:.2f})")
    alarm = None
    if new_upper > test.threshold:
        alarm = "upper"
    elif new_lower > test.threshold:
        alarm = "lower"
    elif inversion_stat > test.inversion_threshold:
        alarm = "inversion"
    aim = updated.peak_at(clock + 0.5 * next_interval_s)
    move = float(np.clip(aim - detuning_hz, -settings.max_correction_hz, settings.max_correction_hz))
    target = detuning_hz + move
    if limits is not None:
        target = float(np.clip(target, limits[0], limits[1]))
    if alarm is not None:
        side = {"upper": "the peak moved up beyond what the lock follows",
                "lower": "the peak moved down beyond what the lock follows",
                "inversion": "the inversion dropped below its reference"}[alarm]
        return Assessment(True, "", offset, offset_sd, peak, variance, innovation, updated,
                          new_upper, new_lower, inversion_stat, inversion_z, "alarm", alarm,
                          detuning_hz, f"{numbers}: alarm, {side}; retune")
    rising = new_upper > test.warning or new_lower > test.warning or \
        inversion_stat > test.inversion_warning
    action = "hold"
    if abs(target - detuning_hz) >= settings.min_correction_hz:
        action = "correct"
    if rising:
        why = "a statistic is above its warning level: check again at once"
        return Assessment(True, "", offset, offset_sd, peak, variance, innovation, updated,
                          new_upper, new_lower, inversion_stat, inversion_z, "recheck", None,
                          target if action == "correct" else detuning_hz,
                          f"{numbers}: {why}" + (f"; lock moves the detuning by "
                                                 f"{(target - detuning_hz) / 1e3:+.2f} kHz"
                                                 if action == "correct" else ""))
    if action == "correct":
        limited = " (bounded)" if abs(aim - target) > 1.0 else ""
        why = (f"lock moves the detuning by {(target - detuning_hz) / 1e3:+.2f} kHz to "
               f"{target / 1e3:+.2f} kHz{limited}, the predicted peak at the middle of the next "
               f"interval (gain {innovation.gain:.2f}, drift {updated.rate_hz_per_s:+.2f} Hz/s)")
    else:
        why = (f"held: the lock's correction {(aim - detuning_hz) / 1e3:+.2f} kHz is below "
               f"{settings.min_correction_hz / 1e3:.2f} kHz")
    return Assessment(True, "", offset, offset_sd, peak, variance, innovation, updated, new_upper,
                      new_lower, inversion_stat, inversion_z, action, None, target,
                      f"{numbers}: {why}")


def peak_after_change(recent: Sequence[Mapping[str, Any]], side: str, rate_hz_per_s: float,
                      clock_s: float) -> tuple[float, float] | None:
    """Where the peak is after an alarm, from the checks since the alarming statistic left zero.

    Page's CUSUM dates the change at the last check where the alarming statistic was zero
    (the maximum-likelihood change point for a known shift); the checks after it measured the
    new peak. Their measured peaks, carried to ``clock_s`` with the drift rate, are averaged
    with weights ``1 / variance``.

    Parameters
    ----------
    recent : sequence of mappings
        Latest checks, oldest first: ``clock_s``, ``peak_hz``, ``variance_hz2`` and the
        statistics ``upper``, ``lower`` after each (None when the check was unusable).
    side : {"upper", "lower"}

    Returns
    -------
    (float, float) or None
        The peak at ``clock_s`` and its standard error (Hz), or None without usable checks.
    """
    run: list[Mapping[str, Any]] = []
    for row in reversed(recent):
        if row.get("peak_hz") is None or not row.get(side):
            break
        run.append(row)
    if not run:
        return None
    weights = np.array([1.0 / float(r["variance_hz2"]) for r in run])
    values = np.array([float(r["peak_hz"]) + rate_hz_per_s * (clock_s - float(r["clock_s"]))
                       for r in run])
    mean = float((weights * values).sum() / weights.sum())
    return mean, float(math.sqrt(1.0 / weights.sum()))


def recheck_run_limit(test: SequentialTest) -> int:
    """Most rechecks in a row the phase charts call at once (checks).

    The warning level brings the next check at once so that a shift at or beyond the design
    shift is confirmed back to back: at the design shift (``2 k`` standard deviations of the
    innovation) the chart needs Siegmund's run length of checks (:func:`cusum_arl`). A chart
    that stays between its warning level and its threshold for longer is following a shift
    smaller than the design shift, which by construction keeps the inversion above the floor:
    it no longer needs checks at once, and checks back to back for it would spend the checks'
    share many times over (16 in a row, twice in a held-out night, ran its budget out by the
    fifth hour). The chart keeps its value, so the alarm still comes if the shift grows.
    """
    k, h = float(test.reference), float(test.threshold)
    return max(1, math.ceil(cusum_arl(2.0 * k, k, h)))


def next_check(plan: CheckPlan, *, action: str, clock_s: float, first_shot_s: float | None,
               run: int) -> dict[str, Any]:
    """When the check after one assessed as ``action`` comes (rig s), and whether it is a recheck.

    A recheck comes at once (``clock_s``) while the rechecks in a row, ``run`` before this one,
    stay within :func:`recheck_run_limit`; any other check comes the plan's interval after the
    first shot of the last (``first_shot_s``, else ``clock_s``). Returns ``due_clock``,
    ``recheck`` and ``run`` (the rechecks in a row, this one included).
    """
    if action == "recheck":
        run = int(run) + 1
        if run <= recheck_run_limit(plan.test):
            return {"due_clock": float(clock_s), "recheck": True, "run": run}
    else:
        run = 0
    start = float(clock_s if first_shot_s is None else first_shot_s)
    return {"due_clock": start + plan.interval_s, "recheck": False, "run": run}


# --------------------------------------------------------------------------------------------
# The beam budget
# --------------------------------------------------------------------------------------------

#: Rig time a night without a known end counts ahead of its clock for its ceiling (s).
OPEN_NIGHT_HORIZON_S = 3600.0
# The checks' share of the budget: a half, never more than what is left. Checks come first: a
# recovery the rest cannot pay for in full is made smaller or replaced by a correction to the
# checks' own estimate of the peak (:func:`choose_recovery`), while a step no check looks at is
# lost for the whole delay. (Giving the checks only what the recoveries expected in the rest of
# the night left over, down to a quarter of the budget, stretched the checks after a retune to
# 20-35 min apart on a velocity-physics night, and its steps went 19-25 min unconfirmed.)
# Recoveries are still expected at the night's own rate so far, from one per four hours (a
# gamma-Poisson estimate, (recoveries + 1) / (elapsed + 4 h)), each costing the mean of the
# night's retunes (:data:`_RECOVERY_PRIOR_S`), and the plan states whether the rest pays for them.
_CHECK_SHARE = 0.5


@dataclass(frozen=True)
class BeamBudget:
    """The night's beam time on holding against its ceiling, counted as it goes.

    The ceiling is ``budget_fraction`` of the night's rig time: of its whole planned length
    when its end is known (``remaining_s``), else of the rig time so far plus
    :data:`OPEN_NIGHT_HORIZON_S`. Nothing that holding starts may take the beam spent past it:
    every check and every stage is paid for, at its largest possible size, from ``left_s``
    before it begins.

    Attributes
    ----------
    fraction : float
        ``HoldSettings.budget_fraction``.
    elapsed_s : float
        Rig time of the night so far (s).
    remaining_s : float or None
        Rig time to the night's end (s); None when it has none.
    spent_s : float
        Beam time holding has taken so far (s): checks, retunes, calibrations (not a
        calibration the night began with).
    """

    fraction: float
    elapsed_s: float
    remaining_s: float | None
    spent_s: float

    @classmethod
    def of(cls, settings: HoldSettings, *, elapsed_s: float, remaining_s: float | None,
           spent_s: float) -> BeamBudget:
        """The budget of ``settings`` (its ``budget_fraction`` is the one source)."""
        return cls(float(settings.budget_fraction), max(float(elapsed_s), 0.0),
                   None if remaining_s is None else max(float(remaining_s), 0.0),
                   max(float(spent_s), 0.0))

    @property
    def ahead_s(self) -> float:
        """Rig time ahead that the ceiling counts (s)."""
        return OPEN_NIGHT_HORIZON_S if self.remaining_s is None else self.remaining_s

    @property
    def ceiling_s(self) -> float:
        """Most beam time holding may have taken by the night's end (s)."""
        return self.fraction * (self.elapsed_s + self.ahead_s)

    @property
    def left_s(self) -> float:
        """Beam time holding may still take (s)."""
        return max(self.ceiling_s - self.spent_s, 0.0)

    def affords(self, beam_s: float) -> bool:
        """Whether ``beam_s`` more stays within the ceiling."""
        return self.spent_s + float(beam_s) <= self.ceiling_s + 1e-9

    def after(self, beam_s: float, rig_s: float = 0.0) -> BeamBudget:
        """The budget once ``beam_s`` more is spent and ``rig_s`` of rig time passed."""
        remaining = None if self.remaining_s is None else max(self.remaining_s - rig_s, 0.0)
        return replace(self, elapsed_s=self.elapsed_s + rig_s, remaining_s=remaining,
                       spent_s=self.spent_s + beam_s)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping with the derived numbers."""
        return {**asdict(self), "ceiling_s": self.ceiling_s, "left_s": self.left_s}


def least_check_s(settings: HoldSettings) -> float:
    """Beam time of the smallest check (``min_shots_per_phase``), s."""
    return 2 * settings.ramsey_phases * settings.min_shots_per_phase / settings.repetition_rate_hz


def checks_reserve_s(settings: HoldSettings, budget: BeamBudget) -> float:
    """Beam time kept for the checks of the rest of the night when a recovery is sized: the
    smallest checks every ``max_interval_s`` (s)."""
    return least_check_s(settings) * math.ceil(budget.ahead_s / settings.max_interval_s)


def checks_share(settings: HoldSettings, budget: BeamBudget, *, recovery_beam_s: float,
                 recoveries: int) -> dict[str, float]:
    """The share of beam time the checks may take now, with its numbers.

    Half the budget fraction, never more than what is left of the ceiling spread over the rest
    of the night; a share of 0 means no check can be paid for. The numbers state what the
    recoveries expected in the rest of the night would take (at the night's own rate so far,
    from one per four hours: ``(recoveries + 1) / (elapsed + 4 h)``, each costing
    ``recovery_beam_s``: ``reserve_s``) against what the checks leave them
    (``recoveries_left_s``); a recovery the rest cannot pay for is made smaller when it comes
    (:func:`choose_recovery`).
    """
    ahead = max(budget.ahead_s, 60.0)
    rate = (recoveries + 1.0) / (budget.elapsed_s + _RECOVERY_PRIOR_S)
    reserve = rate * ahead * max(recovery_beam_s, 0.0)
    allowance = (budget.left_s - reserve) / ahead
    share = min(_CHECK_SHARE * budget.fraction, budget.left_s / ahead)
    return {"share": share, "allowance": allowance, "remaining_s": ahead,
            "reserve_s": reserve, "recoveries_left_s": max(budget.left_s - share * ahead, 0.0),
            "recoveries_per_h": rate * 3600.0,
            "recovery_beam_s": recovery_beam_s, "holding_beam_s": budget.spent_s,
            "left_s": budget.left_s, "ceiling_s": budget.ceiling_s}


def expected_stage_beam_s(prior_s: float, spent: Sequence[float]) -> float:
    """Beam a recovery of one kind is expected to take (s): the mean of the night's recoveries
    of that kind so far with the prior counted as one more (a stage that found the condition
    still good costs less than one that had to recover it, and a night that met only the
    former would otherwise plan its reserve too small)."""
    values = [float(prior_s), *[float(x) for x in spent]]
    return float(np.mean(values))


def plan_night(settings: HoldSettings, *, budget: BeamBudget, rows: Sequence[Sequence[float]],
               prior: LockPrior, lock: DriftLock, reference: Mapping[str, float],
               recovery_beam_s: float, recoveries: int, step_hz: float = 15e3
               ) -> tuple[CheckPlan | None, dict[str, float]]:
    """The night's plan of its checks now: the share the budget gives them
    (:func:`checks_share`), then their cadence, shots and test (:func:`plan_checks`) from the
    measurements so far (``rows`` of :func:`noise_row`: the noise and the signal models).

    Returns the plan (None when the budget has no share for a check) and the share's numbers.
    """
    share = checks_share(settings, budget, recovery_beam_s=recovery_beam_s,
                         recoveries=recoveries)
    if share["share"] <= 0.0:
        return None, share
    noise = NoiseModel.from_estimates([(r[0], r[1], int(r[2])) for r in rows])
    inversion, stderr = reference_value(reference)
    plan = plan_checks(settings, noise=noise, prior=prior, lock=lock,
                       reference_inversion=inversion, reference_stderr=stderr,
                       check_share=share["share"], step_hz=step_hz,
                       signal=SignalModel.from_rows(rows),
                       step_rate_per_s=share["recoveries_per_h"] / 3600.0)
    return plan, share


def unwatched_until(settings: HoldSettings, budget: BeamBudget, *, clock_s: float,
                    start_clock_s: float) -> float:
    """Rig clock until which a night that cannot pay for a check holds without checks: the end
    of a night with one, else when the open night's growing ceiling affords the least check
    again (at least a minute on)."""
    if budget.remaining_s is None:
        return max(start_clock_s + (budget.spent_s + least_check_s(settings)) / budget.fraction
                   - OPEN_NIGHT_HORIZON_S, clock_s + 60.0)
    return clock_s + max(budget.remaining_s, 60.0)


@dataclass(frozen=True)
class StageSize:
    """How large a stage of the night may grow, in shots.

    Attributes
    ----------
    kind : {"retune", "calibrate"}
    check_shots_per_phase : int
        A retune's check (0 for a calibration).
    verification_shots_per_phase : int
        Its verification and each correction.
    max_corrections : int
        Re-verifications after the verification.
    max_shots : int
        The steps before the verification, the check included (the stage's shot budget).
    max_points : int
        Most search points.
    """

    kind: str
    check_shots_per_phase: int
    verification_shots_per_phase: int
    max_corrections: int
    max_shots: int
    max_points: int

    def shots(self, phases: int) -> int:
        """The most shots the stage can take (a check larger than the budget counted whole)."""
        check = 2 * phases * self.check_shots_per_phase
        verify = 2 * phases * self.verification_shots_per_phase
        return max(self.max_shots, check) + (1 + self.max_corrections) * verify

    def beam_s(self, phases: int, repetition_rate_hz: float) -> float:
        """The most beam time the stage can take (s)."""
        return self.shots(phases) / float(repetition_rate_hz)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> StageSize:
        """Rebuild from :meth:`to_dict`."""
        return cls(**{f.name: data[f.name] for f in fields(cls)})


def _fit(size: StageSize, shots_left: int, phases: int, least_per_phase: int) -> StageSize | None:
    """``size`` cut so that its most shots are at most ``shots_left``: fewer corrections, then a
    smaller shot budget (at least the check and one more step of its size), then smaller check
    and verification shots (not below ``least_per_phase``); None when nothing fits."""
    for per_phase in sorted({size.verification_shots_per_phase,
                             *[max(least_per_phase, size.verification_shots_per_phase // d)
                               for d in (2, 4, 8, 16)]}, reverse=True):
        check = min(size.check_shots_per_phase, per_phase) if size.check_shots_per_phase else 0
        step = 2 * phases * max(check, per_phase)
        for corrections in range(size.max_corrections, -1, -1):
            verify = (1 + corrections) * 2 * phases * per_phase
            budget = min(size.max_shots, shots_left - verify)
            if budget >= 2 * step or (budget >= step and size.kind == "retune"):
                return replace(size, check_shots_per_phase=check,
                               verification_shots_per_phase=per_phase,
                               max_corrections=corrections, max_shots=int(budget))
    return None


@dataclass(frozen=True)
class RecoveryChoice:
    """What a recovery does within the budget, and why.

    Attributes
    ----------
    action : {"stage", "smaller", "correct", "hold"}
        The stage at its planned size (its shot budget capped at what is left); a smaller one
        (fewer shots for its check, verification and search); a correction of the detuning to
        the checks' own estimate of the peak without a stage; or holding on with no stage.
    kind : {"retune", "calibrate"}
    size : StageSize or None
        The stage's size (None without a stage).
    beam_s : float
        The most beam time it can take (s).
    available_s : float
        Beam time the budget had for it (s): what is left less the checks' reserve.
    expected_s : float
        What a stage of this kind is expected to take at its planned size (s).
    target_hz : float or None
        The corrected detuning set-point (``"correct"``).
    limited : bool
        Whether the budget made the night take less than the planned stage.
    reason : str
        One sentence with the numbers.
    """

    action: str
    kind: str
    size: StageSize | None
    beam_s: float
    available_s: float
    expected_s: float
    target_hz: float | None
    limited: bool
    reason: str

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping."""
        out = {f.name: getattr(self, f.name) for f in fields(self)}
        out["size"] = None if self.size is None else self.size.to_dict()
        return out


def choose_recovery(settings: HoldSettings, *, kind: str, planned: StageSize,
                    budget: BeamBudget, expected_s: float,
                    peak: tuple[float, float] | None = None) -> RecoveryChoice:
    """The recovery that keeps the most of the condition within what is left of the budget.

    The beam for it is what is left less the reserve for the checks of the rest of the night
    (:func:`checks_reserve_s`). In order: the stage at its planned size when its expected cost
    fits (its shot budget capped so that even its largest size fits); else a smaller stage
    (:func:`_fit`: fewer corrections, a smaller shot budget, then fewer shots per check and
    verification, down to ``min_shots_per_phase``); else, when the checks located the peak
    (``peak``: its detuning set-point and standard error, Hz), a correction to it without a
    stage; else holding on as it is.

    Parameters
    ----------
    kind : {"retune", "calibrate"}
    planned : StageSize
        The stage at its configured size.
    expected_s : float
        Beam time a stage of this kind is expected to take (s): the mean of the night's so far,
        or a prior.
    """
    phases, rate = settings.ramsey_phases, settings.repetition_rate_hz
    reserve = checks_reserve_s(settings, budget)
    available = max(budget.left_s - reserve, 0.0)
    numbers = (f"{budget.left_s / 60:.1f} min of the {budget.ceiling_s / 60:.1f} min budget left "
               f"({budget.fraction:.0%} of the night), {reserve / 60:.1f} min kept for the checks "
               f"of the rest of it, so {available / 60:.1f} min for this {kind}; expected "
               f"{expected_s / 60:.1f} min at its planned size, at most "
               f"{planned.beam_s(phases, rate) / 60:.1f} min")
    shots_left = int(math.floor(available * rate))
    if expected_s <= available:
        size = _fit(planned, shots_left, phases, planned.verification_shots_per_phase)
        if size is not None:
            capped = size != planned
            return RecoveryChoice(
                "stage", kind, size, size.beam_s(phases, rate), available, expected_s, None,
                False, f"{numbers}: the {kind} at its planned size"
                + (f", its shot budget capped at {size.max_shots} so that it cannot overrun"
                   if capped else ""))
    size = _fit(planned, shots_left, phases, settings.min_shots_per_phase)
    if size is not None:
        return RecoveryChoice(
            "smaller", kind, size, size.beam_s(phases, rate), available, expected_s, None, True,
            f"{numbers}: a smaller {kind} that fits ({size.check_shots_per_phase} check and "
            f"{size.verification_shots_per_phase} verification shots per phase, "
            f"{size.max_corrections} corrections, {size.max_shots} shots before the "
            f"verification; at most {size.beam_s(phases, rate) / 60:.1f} min)")
    if peak is not None:
        return RecoveryChoice(
            "correct", kind, None, 0.0, available, expected_s, float(peak[0]), True,
            f"{numbers}: not even the smallest {kind} fits; the detuning is corrected to the "
            f"peak the checks measured, {peak[0] / 1e3:+.2f} +- {peak[1] / 1e3:.2f} kHz, "
            f"without a {kind}")
    return RecoveryChoice(
        "hold", kind, None, 0.0, available, expected_s, None, True,
        f"{numbers}: not even the smallest {kind} fits and the checks did not locate the peak; "
        f"holding on at the set-points in force")


@dataclass(frozen=True)
class Unheld:
    """Rig time the night could not hold because of the budget, counted as it goes.

    It begins when the budget makes the night take less than it planned (a smaller stage, a
    correction without a stage, holding on without one, checks it cannot pay for) and ends at
    the next accepted stage or the next check that finds the condition held (no alarm, every
    statistic below its warning level), or at the night's end.

    Attributes
    ----------
    since_s : float or None
        Rig clock when the present stretch began (None: none open).
    total_s : float
        Closed stretches so far (s).
    stretches : int
        How many began.
    """

    since_s: float | None = None
    total_s: float = 0.0
    stretches: int = 0

    def begin(self, clock_s: float) -> Unheld:
        """A stretch begins (no change when one is open)."""
        if self.since_s is not None:
            return self
        return replace(self, since_s=float(clock_s), stretches=self.stretches + 1)

    def end(self, clock_s: float) -> Unheld:
        """The open stretch ends (no change when none is)."""
        if self.since_s is None:
            return self
        return replace(self, since_s=None,
                       total_s=self.total_s + max(float(clock_s) - self.since_s, 0.0))

    def at(self, clock_s: float) -> float:
        """Total rig time not held at ``clock_s`` (the open stretch counted to it), s."""
        return self.end(clock_s).total_s

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any] | None) -> Unheld:
        """Rebuild from :meth:`to_dict` (an empty one from None)."""
        if not data:
            return cls()
        return cls(None if data.get("since_s") is None else float(data["since_s"]),
                   float(data.get("total_s", 0.0)), int(data.get("stretches", 0)))


# --------------------------------------------------------------------------------------------
# What the night remembers of its measurements
# --------------------------------------------------------------------------------------------


def noise_row(estimate: Mapping[str, Any], shots: int) -> list[float]:
    """One measurement's row for :class:`NoiseModel` and :class:`SignalModel`.

    ``(phase_sd, inversion_sd, shots, detected_empty, detected_one_photon, contrast_empty,
    contrast_one_photon, chi2, dof)`` from an estimate's mapping
    (:meth:`autotune.analysis.fringe.InversionEstimate.to_dict`) and the measurement's shots.
    """
    return [float(estimate["phase_shift_stderr"]), float(estimate["inversion_stderr"]),
            int(shots), int(estimate.get("detected_empty", 0)),
            int(estimate.get("detected_one_photon", 0)),
            float(estimate.get("contrast_empty", 0.0)),
            float(estimate.get("contrast_one_photon", 0.0)),
            float(estimate.get("chi2_empty", 0.0)) + float(estimate.get("chi2_one_photon", 0.0)),
            int(estimate.get("dof_empty", 0)) + int(estimate.get("dof_one_photon", 0))]


def reference_add(reference: Mapping[str, float], inversion: float, stderr: float
                  ) -> dict[str, float]:
    """The inversion watch's reference with one more measurement (weight ``1 / stderr^2``)."""
    weight = 1.0 / max(stderr, 1e-6) ** 2
    return {"weight": float(reference["weight"]) + weight,
            "weighted": float(reference["weighted"]) + weight * inversion}


def reference_value(reference: Mapping[str, float]) -> tuple[float, float]:
    """``(inversion, stderr)`` of the inversion watch's reference (precision-weighted mean)."""
    weight = float(reference["weight"])
    return float(reference["weighted"]) / weight, 1.0 / math.sqrt(weight)


#: One-sided level of :func:`holds_as_well`: a failed recovery's point is held when its verified
#: inversion is not below the night's reference at this level.
ADOPT_LEVEL = 0.025


def holds_as_well(inversion: float, stderr: float, reference_inversion: float,
                  reference_stderr: float, level: float = ADOPT_LEVEL,
                  min_inversion: float = 0.0) -> dict[str, Any]:
    """Whether a recovery that was not accepted verified a point the night can hold: its
    inversion not significantly below the night's reference.

    A one-sided z-test of the difference of two independent Gaussian estimates: ``z = (inversion
    - reference) / sqrt(stderr^2 + reference_stderr^2)`` and its lower-tail probability
    ``p = Phi(z)``; the point holds as well when ``p >= level`` and the inversion reaches
    ``min_inversion`` (``[acceptance] min_inversion``: the floor is never waived). A retune is accepted only when
    its bound on the shortfall from the true best is tight; one that missed that bound may still
    have found a point as good as the one the night held before the change, far better than the
    set-points the checks have just found off the peak. Holding it (the checks and the lock go on
    from there) costs no beam; a calibration in its place would cost most of the night's budget.

    Returns
    -------
    dict
        ``holds`` (bool), ``z``, ``p`` and the inputs, for the journal.
    """
    spread = math.hypot(float(stderr), float(reference_stderr))
    z = (float(inversion) - float(reference_inversion)) / max(spread, 1e-12)
    p = 0.5 * math.erfc(-z / math.sqrt(2.0))
    return {"holds": bool(p >= level and float(inversion) >= float(min_inversion)), "z": z,
            "p": p, "level": float(level), "min_inversion": float(min_inversion),
            "inversion": float(inversion), "stderr": float(stderr),
            "reference_inversion": float(reference_inversion),
            "reference_stderr": float(reference_stderr)}


def lock_before_change(recent: Sequence[Mapping[str, Any]], side: str | None
                       ) -> DriftLock | None:
    """The lock before the first check of the alarming run (the drift rate it had learned).

    ``recent`` rows carry ``lock_before`` (:meth:`DriftLock.to_dict`) and the statistics; for an
    alarm of the inversion or an unreadable phase, the lock before the last check.
    """
    if side not in ("upper", "lower"):
        return DriftLock.from_dict(recent[-1]["lock_before"]) if recent else None
    first = None
    for row in reversed(recent):
        if not row.get(side):
            break
        first = row
    return None if first is None else DriftLock.from_dict(first["lock_before"])


def recovery_start(recent: Sequence[Mapping[str, Any]], side: str | None, lock: DriftLock,
                   held: Mapping[str, float], limits: tuple[float, float], clock_s: float
                   ) -> tuple[dict[str, float], DriftLock, tuple[float, float] | None]:
    """Where a recovery starts after an alarm of ``side``.

    Returns the set-points to start from (the held ones, the detuning moved to the peak the
    checks since the change point measured, :func:`peak_after_change`, within ``limits``), the
    lock before the change (its rate carries over) and that peak with its standard error (Hz;
    None when the alarm was not of the phase or no check located it).
    """
    pre = lock_before_change(recent, side) or lock
    start = {k: float(v) for k, v in held.items()}
    found = None
    if side in ("upper", "lower"):
        found = peak_after_change(recent, side, pre.rate_hz_per_s, clock_s)
        if found is not None:
            start["detuning"] = min(max(found[0], limits[0]), limits[1])
    return start, pre, found
