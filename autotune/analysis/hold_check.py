"""One check of the hold read, and what the night remembers of its measurements (pure).

:func:`assess_check` turns a check's result into an :class:`Assessment` (the lock's update, the
sequential test's statistics, the action); :func:`peak_after_change`, :func:`lock_before_change`
and :func:`recovery_start` say where the peak went after a change, and
:func:`recovery_after_alarm` what the night's state becomes then; :func:`lock_at_stage_end`
starts the lock after a stage; :func:`noise_row` and the
inversion's reference (:func:`reference_add`, :func:`reference_value`) are what the night keeps
of each measurement. :mod:`autotune.analysis.hold` describes the whole and re-exports these.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, fields
from typing import Any

import numpy as np

from autotune.analysis.guided import LockPrior, phase_signal_note
from autotune.analysis.hold_lock import (
    DriftLock,
    HoldSettings,
    Innovation,
    SequentialTest,
    peak_offset,
    reading_phase_sd,
)
from autotune.analysis.hold_plan import CheckPlan
from autotune.analysis.hold_signal import NoiseModel
from autotune.analysis.search_types import PointResult

__all__ = [
    "Assessment",
    "assess_check",
    "peak_after_change",
    "noise_row",
    "reference_add",
    "reference_value",
    "ADOPT_LEVEL",
    "holds_as_well",
    "lock_before_change",
    "recovery_start",
    "recovery_after_alarm",
    "lock_at_stage_end",
]

_TWO_PI = 2.0 * math.pi


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
    # The calibration's gate: a poor source's faint fringe steers when its phase error stays
    # phase_wrap_sigmas of its own standard errors inside the wrap (lock_fit.phase_signal_note).
    note = phase_signal_note(result, settings.lock, prior.phase_at_peak_rad,
                             wrap_sigmas=settings.lock.phase_wrap_sigmas)
    phase_sd, inversion_sd = result.phase_shift_stderr, result.inversion_stderr
    if noise is not None and result.shots > 0:
        # The pooled noise is the peak's; a poor source's one-photon fringe is stronger at the
        # check's own reading (hold_lock.reading_phase_sd; unchanged on a pure photon).
        phase_sd = reading_phase_sd(math.sqrt(noise.phase_variance_shots / result.shots),
                                    error, prior.mixture_empty_fraction,
                                    result.contrast_empty, result.contrast_one_photon)
        inversion_sd = math.sqrt(noise.inversion_variance_shots / result.shots)
    inv_sd = math.sqrt(inversion_sd**2 + reference_stderr**2)
    inversion_z = (reference_inversion - result.inversion) / inv_sd if inv_sd > 0 else 0.0
    inversion_stat = max(0.0, inversion + inversion_z - test.inversion_reference)
    if note is not None:
        return _unusable(note, lock=lock, upper=upper, lower=lower, inversion=inversion_stat,
                         inversion_z=inversion_z, detuning_hz=detuning_hz,
                         again=previous_unusable)
    # The check's own noise only: the stored curve's uncertainty (slope, cubic) is the same at
    # every check, a bias of the peak's scale, not noise; counted as noise it would make a large
    # phase error look insignificant (the offset's error grows as D^3) and hide a step.
    offset, offset_sd = peak_offset(error, phase_sd, prior)
    peak = detuning_hz - offset
    variance = max(offset_sd**2, 1.0)
    updated, innovation = lock.update(clock, peak, variance, max_gain=settings.max_gain)
    new_upper, new_lower = SequentialTest.step(upper, lower, innovation.z, test.reference)
    if max(upper, lower, new_upper, new_lower) > test.warning:
        # A change is suspected (a phase chart at or above its warning level before or after
        # this check): the check measures the change, not the drift; the rate keeps what the
        # quiet checks taught it (a held-out night took a 15 kHz step it followed through a run
        # of rechecks into a drift rate of +4.4 Hz/s, carried through four retunes).
        updated, innovation = lock.update(clock, peak, variance, max_gain=settings.max_gain,
                                          learn_rate=False)
    numbers = (f"phase error {error / math.pi:+.3f} +- {phase_sd / math.pi:.3f} pi: "
               f"set-point {offset / 1e3:+.2f} +- {offset_sd / 1e3:.2f} kHz from the peak; "
               f"innovation {innovation.value_hz / 1e3:+.2f} kHz (z {innovation.z:+.2f}); "
               f"statistics S+ {new_upper:.2f}, S- {new_lower:.2f} (h {test.threshold:.2f}), "
               f"inversion {result.inversion:.3f} vs {reference_inversion:.3f} "
               f"(S {inversion_stat:.2f}, h {test.inversion_threshold:.2f})")
    aim = updated.peak_at(clock + 0.5 * next_interval_s)
    move = float(np.clip(aim - detuning_hz, -settings.max_correction_hz, settings.max_correction_hz))
    target = detuning_hz + move
    if limits is not None:
        target = float(np.clip(target, limits[0], limits[1]))
    read = {"offset": offset, "offset_sd": offset_sd, "peak": peak, "variance": variance,
            "innovation": innovation, "lock": updated, "upper": new_upper, "lower": new_lower,
            "inversion": inversion_stat, "inversion_z": inversion_z}
    return _decide(settings, test, read, detuning_hz=detuning_hz, aim=aim, target=target,
                   numbers=numbers)


def _unusable(note: str, *, lock: DriftLock, upper: float, lower: float, inversion: float,
              inversion_z: float, detuning_hz: float, again: bool) -> Assessment:
    """A check the lock cannot read: checked again at once, the alarm when ``again``."""
    action, alarm, reason = (("alarm", "out_of_range", f"check unusable for the lock again "
                              f"({note}): the lock cannot follow; retune") if again else
                             ("recheck", None, f"check unusable for the lock ({note}): check "
                              f"again at once"))
    return Assessment(False, note, math.nan, math.nan, math.nan, math.nan, None, lock, upper,
                      lower, inversion, inversion_z, action, alarm, detuning_hz, reason)


def _decide(settings: HoldSettings, test: SequentialTest, read: Mapping[str, Any], *,
            detuning_hz: float, aim: float, target: float, numbers: str) -> Assessment:
    """The action of a check the lock read (``read``: its offset, the lock's update and the
    statistics after it): an alarm, else a recheck, else a correction or holding on."""
    common = (True, "", read["offset"], read["offset_sd"], read["peak"], read["variance"],
              read["innovation"], read["lock"], read["upper"], read["lower"],
              read["inversion"], read["inversion_z"])
    new_upper, new_lower, inversion_stat = read["upper"], read["lower"], read["inversion"]
    alarm = None
    if new_upper > test.threshold:
        alarm = "upper"
    elif new_lower > test.threshold:
        alarm = "lower"
    elif inversion_stat > test.inversion_threshold:
        alarm = "inversion"
    if alarm is not None:
        side = {"upper": "the peak moved up beyond what the lock follows",
                "lower": "the peak moved down beyond what the lock follows",
                "inversion": "the inversion dropped below its reference"}[alarm]
        return Assessment(*common, "alarm", alarm, detuning_hz,
                          f"{numbers}: alarm, {side}; retune")
    rising = new_upper > test.warning or new_lower > test.warning or \
        inversion_stat > test.inversion_warning
    action = "hold"
    if abs(target - detuning_hz) >= settings.min_correction_hz:
        action = "correct"
    if rising:
        why = "a statistic is above its warning level: check again at once"
        return Assessment(*common, "recheck", None,
                          target if action == "correct" else detuning_hz,
                          f"{numbers}: {why}" + (f"; lock moves the detuning by "
                                                 f"{(target - detuning_hz) / 1e3:+.2f} kHz"
                                                 if action == "correct" else ""))
    if action == "correct":
        limited = " (bounded)" if abs(aim - target) > 1.0 else ""
        why = (f"lock moves the detuning by {(target - detuning_hz) / 1e3:+.2f} kHz to "
               f"{target / 1e3:+.2f} kHz{limited}, the predicted peak at the middle of the next "
               f"interval (gain {read['innovation'].gain:.2f}, drift "
               f"{read['lock'].rate_hz_per_s:+.2f} Hz/s)")
    else:
        why = (f"held: the lock's correction {(aim - detuning_hz) / 1e3:+.2f} kHz is below "
               f"{settings.min_correction_hz / 1e3:.2f} kHz")
    return Assessment(*common, action, None, target, f"{numbers}: {why}")


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


def recovery_after_alarm(a: Assessment, *, point: int, plan: CheckPlan,
                         recent: Sequence[Mapping[str, Any]], lock: DriftLock,
                         held: Mapping[str, float], limits: tuple[float, float], clock_s: float,
                         prior: Mapping[str, Any], first_index: int) -> dict[str, Any]:
    """The night's state after the alarm of check ``point`` (``a.action == "alarm"``).

    ``mode`` ``"recover"``; ``recover``: the stage kinds to try, where to start
    (:func:`recovery_start`), the lock prior (``prior``, a :meth:`LockPrior.to_dict`), the
    reason, the first stage index, the alarm (its statistic, value and threshold) and the peak
    the checks since the change point measured (None when none did); ``rate``: the drift rate of
    the lock before the change, which the recovery carries over.
    """
    start, pre, found = recovery_start(recent, a.alarm, lock, held, limits, clock_s)
    side = a.alarm
    thresholds = {"upper": plan.test.threshold, "lower": plan.test.threshold,
                  "inversion": plan.test.inversion_threshold, "out_of_range": None}
    values = {"upper": a.upper, "lower": a.lower, "inversion": a.inversion, "out_of_range": None}
    alarm = {"point": point, "reason": a.reason, "statistic": side, "value": values[side],
             "threshold": thresholds[side]}
    moved = (f"; the retune starts at the peak the checks since the change point measured, "
             f"{start['detuning'] / 1e3:+.2f} kHz" if start != held else "")
    return {"mode": "recover",
            "recover": {"kinds": ["retune", "calibrate"], "start": start, "prior": prior,
                        "reason": a.reason + moved, "first_index": first_index, "alarm": alarm,
                        "peak": None if found is None else [found[0], found[1]]},
            "rate": {"rate_hz_per_s": pre.rate_hz_per_s,
                     "rate_stderr_hz_per_s": pre.rate_stderr_hz_per_s}}


def lock_at_stage_end(settings: HoldSettings, prior: LockPrior, estimate: Any, *,
                      detuning_hz: float, clock_s: float, rate: Mapping[str, float]) -> DriftLock:
    """The lock's start after a stage: its last measurement at the chosen set-points is the
    lock's first, the peak at ``detuning_hz`` minus its offset (:func:`peak_offset`) with the
    stage's precision (outside the capture range: the set-point itself, ``max_correction_hz``
    of uncertainty), the drift ``rate`` (``rate_hz_per_s``, ``rate_stderr_hz_per_s``) carried.

    ``estimate`` has ``phase_shift`` and ``phase_shift_stderr`` (rad), an
    :class:`~autotune.analysis.fringe.InversionEstimate`.
    """
    error = math.remainder(estimate.phase_shift - prior.phase_at_peak_rad, _TWO_PI)
    offset, offset_sd = peak_offset(error, estimate.phase_shift_stderr, prior)
    if abs(error) > settings.lock.capture_phase_error_rad:
        offset, offset_sd = 0.0, settings.max_correction_hz
    return DriftLock.start(clock_s, detuning_hz - offset, max(offset_sd, 1.0),
                           float(rate["rate_hz_per_s"]), float(rate["rate_stderr_hz_per_s"]),
                           settings.walk_hz_per_sqrt_s)
