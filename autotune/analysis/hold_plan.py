"""The plan of the hold's checks: their interval, shots and warning level, and when the next
one is due (pure).

:func:`plan_checks` chooses the cadence that minimises the expected time to confirm a thermal
step from the measured noise, the stored slope and the drift filter's state, within the share
of beam time the checks may take; the Brook-Evans chain of the CUSUM (:func:`cusum_chain`,
:func:`flag_probability`, :func:`in_control_rechecks`) weighs the warning level. :func:`next_check`
says when the next check is due. :mod:`autotune.analysis.hold` describes the whole and
re-exports these.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from typing import Any

import numpy as np
from scipy import special

from autotune.analysis.guided import LockPrior
from autotune.analysis.hold_lock import (
    RATE_WALK_HZ_PER_S_PER_SQRT_S,
    DriftLock,
    HoldSettings,
    SequentialTest,
    cusum_arl,
    cusum_threshold,
    floor_phase_rad,
    floor_shift_hz,
    step_reading,
)
from autotune.analysis.hold_signal import USABLE_Z, NoiseModel, SignalModel
from autotune.errors import ValueRefused
from autotune.wire.rig import measurement_shots

__all__ = [
    "RECOVERY_PRIOR_S",
    "CheckPlan",
    "cusum_chain",
    "in_control_rechecks",
    "in_control_sooner",
    "SOONER_LEVEL",
    "SOONER_INTERVAL",
    "flag_probability",
    "readable_z",
    "plan_checks",
    "step_delay_of",
    "recheck_run_limit",
    "next_check",
]

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

#: A check that leaves a phase chart at or above this fraction of its warning level (and below
#: the warning level) brings the next check after :data:`SOONER_INTERVAL` of the interval: the
#: middle zone of a CUSUM with variable sampling intervals (M. R. Reynolds, R. W. Amin and
#: J. C. Arnold, Technometrics 32, 371 (1990)). A step whose first check saw it at about two
#: standard deviations, short of the warning level, waited a whole interval more (two of seven
#: steps on mismatch nights, 6.2 min each).
SOONER_LEVEL = 0.5
SOONER_INTERVAL = 0.5

# One-sided 5 % (scipy.stats.norm.isf(0.05)): the least room of a check, however rare the checks.
_LEAST_USABLE_Z = 1.645
# Least ratio of the design shift to the innovation's standard deviation of a check that can
# tell a step from noise (the test's k at least a half).
_MIN_DESIGN_SNR = 1.0
# Rig time of the prior of the night's rate of steps and recoveries: one per four hours,
# counted as one more recovery (s).
RECOVERY_PRIOR_S = 4 * 3600.0



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
    qr = RATE_WALK_HZ_PER_S_PER_SQRT_S**2
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


def cusum_chain(shift: float, reference: float, threshold: float, cells: int = _CHAIN_CELLS
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
    """Centres and in-control stationary distribution of the chain of :func:`cusum_chain`, an alarm
    restarting the chart at 0 (a renewal)."""
    centres, moves = cusum_chain(0.0, reference, threshold, cells)
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

    The stationary distribution of the Brook-Evans chain (:func:`cusum_chain`, an alarm restarting
    the chart at 0), carried one step on exactly: ``P(w <= S' <= h)`` for the normal step from
    each cell.
    """
    centres, stationary = _stationary(float(reference), float(threshold), int(cells))
    above = special.ndtr(threshold - centres + reference) - \
        special.ndtr(warning - centres + reference)
    return float(np.clip(stationary @ np.maximum(above, 0.0), 0.0, 1.0))


def in_control_sooner(reference: float, threshold: float, warning: float,
                      cells: int = _CHAIN_CELLS) -> float:
    """Long-run share of a one-sided chart's in-control checks that leave it in the middle zone,
    at or above ``SOONER_LEVEL`` of the warning level and below the warning level (each followed
    by the next check after ``SOONER_INTERVAL`` of the interval): :func:`in_control_rechecks` at
    the two levels, subtracted."""
    return max(in_control_rechecks(reference, threshold, SOONER_LEVEL * warning, cells)
               - in_control_rechecks(reference, threshold, warning, cells), 0.0)


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


def step_delay_of(plan: CheckPlan, step_hz: float, *, late: bool = False) -> float:
    """Expected rig time ``plan``'s checks, as planned (cadence, size, test), take to confirm a
    shift of ``step_hz`` (s; inf when they cannot): :func:`_delay` of the shift over the
    plan's innovation deviation, the same number as ``plan.step_delay_s`` (``late``:
    ``step_delay_late_s``) for the step it was planned for."""
    test = plan.test
    shift_sd = abs(float(step_hz)) / float(plan.inputs["innovation_sd_hz"])
    flag = flag_probability(shift_sd, test.reference, test.threshold, test.warning) \
        if shift_sd > test.reference else 0.0
    return _delay(shift_sd, test.reference, test.threshold, test.warning, plan.interval_s,
                  plan.check_s, late=late, flag=flag)


def _check_row(settings: HoldSettings, *, interval: float, per_phase: int, phase_var: float,
               slope: float, design: float, shifts: np.ndarray, step_hz: float,
               noise: NoiseModel, lock: DriftLock, reference_inversion: float,
               reference_stderr: float, warning_fraction: float,
               steady: dict[tuple[float, int], tuple[float, float]],
               step_read: tuple[float, float]) -> dict[str, Any]:
    """The numbers of checks of ``per_phase`` shots every ``interval`` s, warning level
    ``warning_fraction`` of each threshold (``steady`` caches the filter's steady state;
    ``step_read`` is :func:`step_reading` of ``step_hz``)."""
    phases = settings.ramsey_phases
    shots = measurement_shots(phases, per_phase)
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
    # back) and by the phase charts' middle zone (SOONER_LEVEL: the next check after
    # SOONER_INTERVAL of the interval). Passes until the gap settles (to 0.1 %, at most six):
    # the rechecks and the middle zone depend on the thresholds they help set.
    gap = interval
    recheck = sooner = 0.0
    for _ in range(6):
        previous = gap
        checks_between_false_alarms = max(settings.false_alarm_interval_s / gap, 1.0)
        h = cusum_threshold(k, 3.0 * checks_between_false_alarms)
        h_inv = cusum_threshold(k_inv, 3.0 * checks_between_false_alarms)
        recheck = min(2.0 * in_control_rechecks(k, h, warning_fraction * h)
                      + in_control_rechecks(k_inv, h_inv, warning_fraction * h_inv), 0.9)
        sooner = min(2.0 * in_control_sooner(k, h, warning_fraction * h), 0.95 - recheck)
        gap = (1.0 - recheck - sooner) * interval + sooner * SOONER_INTERVAL * interval \
            + recheck * check_s
        if abs(gap - previous) <= 1e-3 * previous:
            break
    rate_sd = lock.rate_stderr_hz_per_s
    tracking = math.sqrt(p_post + settings.walk_hz_per_sqrt_s**2 * interval / 2.0
                         + (rate_sd * interval) ** 2 / 3.0
                         + (lock.rate_hz_per_s * interval) ** 2 / 12.0)
    arl = 1.0 / (2.0 / cusum_arl(0.0, k, h) + 1.0 / cusum_arl(0.0, k_inv, h_inv))
    w, w_inv = warning_fraction * h, warning_fraction * h_inv
    step_sd = step_hz / innovation_sd
    flag = flag_probability(step_sd, k, h, w) if step_sd > k else 0.0
    # The step as the check reads it (step_reading: the fringe's bend and the check's own
    # line), over the innovation's deviation at that reading: stated beside the full step's,
    # not chosen on (benchmarks/README.md, session 8: choosing on it shortened main's
    # recoveries but cost a velocity-physics night its budget and a step).
    step_read_hz, step_scale = step_read
    read_z = abs(step_read_hz) / math.sqrt(p_prior + detuning_var * step_scale**2)
    read_flag = flag_probability(read_z, k, h, w) if read_z > k else 0.0
    return {"interval_s": interval, "shots_per_phase": per_phase, "check_s": check_s,
            "detuning_stderr_hz": math.sqrt(detuning_var),
            "test": SequentialTest(k, h, w, k_inv, h_inv, w_inv),
            "shifts": shifts, "recheck_share": recheck, "sooner_share": sooner,
            "mean_gap_s": gap,
            "step_delay_s": _delay(step_sd, k, h, w, interval, check_s, flag=flag),
            "step_delay_late_s": _delay(step_sd, k, h, w, interval, check_s, late=True,
                                        flag=flag),
            "step_flag": flag, "step_z": step_sd, "step_read_hz": abs(step_read_hz),
            "step_read_z": read_z, "step_read_flag": read_flag,
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
    5 % (``z`` at least 1.645) nor more than :data:`USABLE_Z`. Many checks a night need more
    room each than a few.
    """
    checks = max(float(settings.false_alarm_interval_s) / max(float(interval_s), 1.0), 1.0)
    z = float(special.ndtri(1.0 - 1.0 / math.sqrt(3.0 * checks)))
    return min(max(z, _LEAST_USABLE_Z), USABLE_Z)


def plan_checks(settings: HoldSettings, *, noise: NoiseModel, prior: LockPrior, lock: DriftLock,
                reference_inversion: float, reference_stderr: float, check_share: float,
                step_hz: float = 15e3, signal: SignalModel | None = None,
                step_rate_per_s: float = 1.0 / RECOVERY_PRIOR_S) -> CheckPlan:
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
        raise ValueRefused(f"check_share: expected a number in (0, 1], got {check_share!r}")
    slope = abs(prior.slope_rad_per_hz)
    design = floor_shift_hz(settings.floor, prior.slope_rad_per_hz, prior.mixture_empty_fraction)
    capture = settings.lock.capture_phase_error_rad / slope
    shifts = np.geomspace(design, max(capture, design), _SHIFTS)
    phase_var = noise.phase_variance_shots
    if signal is not None:
        phase_var = max(phase_var, signal.phase_variance_shots)
    least_at = functools.cache(functools.partial(_least_shots_per_phase, settings, signal,
                                                 floor_phase_rad(settings.floor,
                                                                 prior.mixture_empty_fraction)))
    common = {"phase_var": phase_var, "slope": slope, "design": design, "shifts": shifts,
              "step_hz": step_hz, "noise": noise, "lock": lock,
              "reference_inversion": reference_inversion, "reference_stderr": reference_stderr,
              "steady": {}, "step_read": step_reading(step_hz, prior)}
    top = max(settings.max_interval_s, _MIN_INTERVAL_S)
    best, fallback = _search_cadences(settings, check_share=check_share, top=top,
                                      step_rate_per_s=step_rate_per_s, least_at=least_at,
                                      common=common)
    inputs = _plan_inputs(settings, noise=noise, signal=signal, prior=prior, lock=lock,
                          phase_var=phase_var, readable=least_at(float(top)),
                          check_share=check_share, reference_inversion=reference_inversion,
                          reference_stderr=reference_stderr, step_hz=step_hz)
    row, why = _choose(settings, best, fallback, check_share=check_share,
                       step_rate_per_s=step_rate_per_s, least=least_at(float(top)),
                       common=common)
    row["expected_delay_s"] = _expected_delay(row)
    for name in ("innovation_sd_hz", "design_snr", "recheck_share", "sooner_share", "mean_gap_s",
                 "step_delay_late_s", "step_flag", "step_z", "step_read_hz", "step_read_z",
                 "step_read_flag"):
        inputs[name] = row[name]
    share = row["check_s"] / row["mean_gap_s"]
    return CheckPlan(interval_s=row["interval_s"], shots_per_phase=row["shots_per_phase"],
                     check_s=row["check_s"], check_share=share,
                     detuning_stderr_hz=row["detuning_stderr_hz"], design_shift_hz=design,
                     test=row["test"], expected_delay_s=row["expected_delay_s"],
                     step_delay_s=row["step_delay_s"],
                     false_alarm_interval_h=row["false_alarm_interval_h"],
                     tracking_error_hz=row["tracking_error_hz"],
                     reason=_plan_reason(row, why, share=share, step_hz=step_hz),
                     inputs=inputs)


def _least_shots_per_phase(settings: HoldSettings, signal: SignalModel | None,
                           design_phase_rad: float, interval: float) -> int:
    """The least shots per phase of a check every ``interval``: the configured least, and what
    the lock needs to read it (:func:`readable_z` of the interval; ``design_phase_rad`` is the
    design shift's phase error, the room it leaves in the capture range)."""
    least = settings.min_shots_per_phase
    if signal is not None:
        readable = signal.usable_shots(
            ratio=settings.lock.min_contrast_ratio,
            phase_margin_rad=settings.lock.capture_phase_error_rad - design_phase_rad,
            z=readable_z(settings, interval), wrap_sigmas=settings.lock.phase_wrap_sigmas,
            wrap_margin_rad=math.pi - design_phase_rad)
        if readable is not None:
            least = max(least, math.ceil(readable / measurement_shots(settings.ramsey_phases, 1)))
    return min(least, settings.max_shots_per_phase)


def _sized(settings: HoldSettings, *, interval: float, fraction: float, check_share: float,
           least: int, common: Mapping[str, Any]) -> dict[str, Any] | None:
    """Checks every ``interval`` as large as the share pays for, rechecks included (None when
    they fall below ``least`` shots per phase)."""
    one = measurement_shots(settings.ramsey_phases, 1)
    rate = settings.repetition_rate_hz
    per_phase = int(math.floor(check_share * interval * rate / one))
    row = None
    for _ in range(4):
        if per_phase < least:
            return None
        per_phase = min(per_phase, settings.max_shots_per_phase)
        row = _check_row(settings, interval=interval, per_phase=per_phase,
                         warning_fraction=fraction, **common)
        if row["check_s"] / row["mean_gap_s"] <= check_share * (1.0 + 1e-9):
            return row
        per_phase = min(per_phase - 1, math.floor(check_share * row["mean_gap_s"] * rate / one))
    return None


def _search_cadences(settings: HoldSettings, *, check_share: float, top: float,
                     step_rate_per_s: float, least_at: Any, common: Mapping[str, Any]
                     ) -> tuple[tuple[float, float, dict[str, Any]] | None,
                                tuple[float, dict[str, Any]] | None]:
    """The candidates of :func:`plan_checks`: the best whose tracking error stays below a third
    of the design shift (``(delay, interval, row)``) and the fallback of the least expected
    share of the night lost (``(lost, row)``); None where no candidate qualifies."""
    design = common["design"]
    one = measurement_shots(settings.ramsey_phases, 1)
    best: tuple[float, float, dict[str, Any]] | None = None
    fallback: tuple[float, dict[str, Any]] | None = None
    for interval in np.geomspace(_MIN_INTERVAL_S, top, _CANDIDATES):
        interval = float(interval)
        least = least_at(interval)
        if math.floor(check_share * interval * settings.repetition_rate_hz / one) < least:
            continue
        for fraction in _WARNING_FRACTIONS:
            row = _sized(settings, interval=interval, fraction=fraction, check_share=check_share,
                         least=least, common=common)
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
    return best, fallback


def _plan_inputs(settings: HoldSettings, *, noise: NoiseModel, signal: SignalModel | None,
                 prior: LockPrior, lock: DriftLock, phase_var: float, readable: int,
                 check_share: float, reference_inversion: float, reference_stderr: float,
                 step_hz: float) -> dict[str, Any]:
    """What a plan was computed from, for its ``inputs``."""
    return {"phase_variance_shots": phase_var,
            "measured_phase_variance_shots": noise.phase_variance_shots,
            "signal": None if signal is None else signal.to_dict(),
            "readable_shots_per_phase": readable,
            "inversion_variance_shots": noise.inversion_variance_shots,
            "noise_measurements": noise.measurements, "slope_rad_per_hz": prior.slope_rad_per_hz,
            "rate_hz_per_s": lock.rate_hz_per_s, "rate_stderr_hz_per_s": lock.rate_stderr_hz_per_s,
            "walk_hz_per_sqrt_s": settings.walk_hz_per_sqrt_s, "check_share": check_share,
            "reference_inversion": reference_inversion, "reference_stderr": reference_stderr,
            "floor": settings.floor, "step_hz": step_hz}


def _choose(settings: HoldSettings, best: tuple[float, float, dict[str, Any]] | None,
            fallback: tuple[float, dict[str, Any]] | None, *, check_share: float,
            step_rate_per_s: float, least: int, common: Mapping[str, Any]
            ) -> tuple[dict[str, Any], str]:
    """The row :func:`plan_checks` takes, and why: the best candidate, else the fallback, else
    fewer but larger checks (:func:`_larger_checks`)."""
    design, step_hz = common["design"], common["step_hz"]
    if best is not None:
        return best[2], (
            f"the least expected time to confirm a {step_hz / 1e3:.0f} kHz step, among the "
            f"cadences and warning levels whose tracking error stays below a third of the "
            f"{design / 1e3:.1f} kHz design shift (the detuning error that takes the inversion "
            f"to {settings.floor:.2f} of the best)")
    if fallback is not None:
        return fallback[1], (
            f"no interval keeps the tracking error below a third of the {design / 1e3:.1f} kHz "
            f"design shift within the budget: the least expected share of the night lost, "
            f"{fallback[0]:.1%} (the tracking error beyond the design shift, and "
            f"{step_rate_per_s * 3600:.2f} steps per hour each unheld for its time to confirm)")
    return _larger_checks(settings, check_share=check_share, least=least, common=common)


def _larger_checks(settings: HoldSettings, *, check_share: float, least: int,
                   common: Mapping[str, Any]) -> tuple[dict[str, Any], str]:
    """Fewer but larger checks: the least size that reads the phase and tells the design shift
    from the noise of one check (twice the bare need: the filter's own uncertainty adds to the
    innovation), spaced to fit the share; the row and why."""
    phases = settings.ramsey_phases
    tell = common["phase_var"] / (common["slope"] * common["design"] / _MIN_DESIGN_SNR) ** 2 * 2.0
    per_phase = min(max(least, int(math.ceil(tell / measurement_shots(phases, 1)))),
                    settings.max_shots_per_phase)
    check_s = measurement_shots(phases, per_phase) / settings.repetition_rate_hz
    row = _check_row(settings, interval=check_s / check_share, per_phase=per_phase,
                     warning_fraction=_WARNING_FRACTIONS[-1], **common)
    why = (f"no interval up to {settings.max_interval_s:g} s affords, within the share, a check "
           f"of {least} shots per phase that the lock reads and that tells the design shift "
           f"from noise: fewer but larger checks")
    return row, why


def _plan_reason(row: Mapping[str, Any], why: str, *, share: float, step_hz: float) -> str:
    """The plan in one sentence, with its numbers."""
    test = row["test"]
    return (f"a check of {row['shots_per_phase']} shots per phase ({row['check_s']:.0f} s of beam, "
            f"{row['detuning_stderr_hz'] / 1e3:.2f} kHz on the peak, the design shift "
            f"{row['design_snr']:.1f} sd of the innovation) every "
            f"{row['interval_s'] / 60:.1f} min of rig time, checked again at once above the "
            f"warning level ({row['recheck_share']:.0%} of the checks in a quiet night), "
            f"after {SOONER_INTERVAL:.0%} of the interval above {SOONER_LEVEL:.0%} of it "
            f"({row['sooner_share']:.0%}; "
            f"{share:.1%} of the beam in all): {why}; test k {test.reference:.2f}, "
            f"h {test.threshold:.2f}, w {test.warning:.2f} (false alarms every "
            f"{row['false_alarm_interval_h']:.0f} h, Siegmund); a {step_hz / 1e3:.0f} kHz step "
            f"is confirmed {row['step_delay_s'] / 60:.1f} min after it in the mean, "
            f"{row['step_delay_late_s'] / 60:.1f} min when it comes just after a check (its "
            f"first check passes the warning level with probability {row['step_flag']:.2f}, "
            f"z {row['step_z']:.1f}; as the check reads it, {row['step_read_hz'] / 1e3:.1f} kHz "
            f"on the fringe's 2π-pulse law, z {row['step_read_z']:.1f}, with probability "
            f"{row['step_read_flag']:.2f}; Brook-Evans chain), a shift at the design "
            f"{row['expected_delay_s'] / 60:.1f} min "
            f"(mean over the shifts to the capture range)")


# --------------------------------------------------------------------------------------------
# When the next check is due
# --------------------------------------------------------------------------------------------


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
               run: int, statistic: float = 0.0) -> dict[str, Any]:
    """When the check after one assessed as ``action`` comes (rig s), and whether it is a recheck.

    A recheck comes at once (``clock_s``) while the rechecks in a row, ``run`` before this one,
    stay within :func:`recheck_run_limit`; a check assessed ``"hold"`` or ``"correct"`` that
    left the larger phase chart (``statistic``, the CUSUM's value after it) at or above
    :data:`SOONER_LEVEL` of the warning level comes :data:`SOONER_INTERVAL` of the plan's
    interval after the first shot of the last (the middle zone of a CUSUM with variable
    sampling intervals; the planner counts its share in the checks' beam,
    :func:`in_control_sooner`); any other check comes the plan's interval after it
    (``first_shot_s``, else ``clock_s``). Returns ``due_clock``, ``recheck``, ``sooner`` and
    ``run`` (the rechecks in a row, this one included).
    """
    if action == "recheck":
        run = int(run) + 1
        if run <= recheck_run_limit(plan.test):
            return {"due_clock": float(clock_s), "recheck": True, "sooner": False, "run": run}
    else:
        run = 0
    start = float(clock_s if first_shot_s is None else first_shot_s)
    sooner = action in ("hold", "correct") and \
        float(statistic) >= SOONER_LEVEL * float(plan.test.warning)
    interval = plan.interval_s * (SOONER_INTERVAL if sooner else 1.0)
    return {"due_clock": start + interval, "recheck": False, "sooner": sooner, "run": run}
