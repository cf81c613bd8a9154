"""Holding the 2π condition through the night: the lock, the sequential test, the plan (pure).

``autotune track`` (:mod:`autotune.run.track`) keeps the rig on the condition between guided
retunes (:func:`autotune.run.loop.run_guided_stage`). Everything it decides comes from this
package's ``hold_*`` modules, which do no I/O; this module describes the whole and re-exports
their public names (``from autotune.analysis.hold import plan_checks``):

- **The drift lock** (:class:`DriftLock`, in :mod:`autotune.analysis.hold_lock`). A short check
  at the set-points in force measures the photon phase shift; with the slope, cubic and phase
  at the peak stored by the last calibration or retune
  (:class:`autotune.analysis.guided.LockPrior`) its phase error gives the
  set-point's offset from the peak, ``D`` (:func:`autotune.analysis.guided.detuning_offset`), so the
  check measures the peak's detuning set-point ``y = d - D`` with variance ``R``. A two-state
  Kalman filter (R. E. Kalman, J. Basic Eng. 82, 35 (1960)) follows that peak and its drift
  rate: the peak ``p`` performs a random walk on top of a rate ``r`` that itself wanders
  slowly (docs/physics.md section 4: a slow ramp plus a random walk). After each check the
  detuning set-point is moved to the filter's prediction of the peak at the middle of the
  coming interval. The gain is the filter's, bounded by ``max_gain`` (the Joseph form keeps the
  covariance right for any gain), and a correction is bounded by ``max_correction_hz`` and the
  rig's steps. A check read while a phase chart of the test below is above its warning level
  moves the peak but not the rate (``DriftLock.update(learn_rate=False)``): a step the filter
  followed through a run of rechecks would otherwise stay in its rate as a ramp.
- **When the lock cannot follow** (:class:`SequentialTest`, in :mod:`autotune.analysis.hold_lock`;
  a check read by :func:`assess_check`, in :mod:`autotune.analysis.hold_check`). The filter's standardised
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
- **The plan** (:func:`plan_checks`, in :mod:`autotune.analysis.hold_plan`, called through
  :func:`plan_night`). The interval between
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
  share, and the false-alarm design in rig time counts their shorter gaps. A check that leaves
  a phase chart between half its warning level and the warning level brings the next one after
  half the interval (a CUSUM with variable sampling intervals: M. R. Reynolds, R. W. Amin and
  J. C. Arnold, Technometrics 32, 371 (1990); :func:`in_control_sooner`, :func:`next_check`),
  counted in the share and the false-alarm design alike.

- **The beam budget** (:class:`BeamBudget`, :func:`checks_share`, :func:`choose_recovery`, in
  :mod:`autotune.analysis.hold_budget`).
  ``HoldSettings.budget_fraction`` of the night's planned rig time is a ceiling on holding
  (checks, retunes, calibrations), counted as the night goes; every action is paid for at its
  largest size before it begins. A recovery the rest cannot pay for at its planned size becomes
  a smaller stage, a correction of the detuning to the checks' estimate of the peak, or
  nothing, and the rig time so left unheld is counted (:class:`Unheld`).
- **The checks sized to the signal** (:class:`SignalModel`, in
  :mod:`autotune.analysis.hold_signal`): detected atoms per shot, the two contrasts and the
  fits' dispersion predict the phase variance per shot and the least check the lock can read,
  so a poor detector gets larger checks that can still tell a step from noise.

- **The outlook** (:func:`step_outlook`, :func:`night_outlook`, :func:`outlook_due`, in
  :mod:`autotune.analysis.hold_outlook`): at the night's first plan, the expected time its
  checks take to confirm a thermal step from this rig's measured signal and the budget; over
  :data:`CONFIRM_WITHIN_S` the night says, before its first check, which ``budget_fraction``,
  which factor on the detected atoms per shot, or which step size would be confirmed within,
  and runs as configured; it says so again at a later plan whose time to confirm has crossed
  the line either way (a retune ate into the budget).

Everything is a deterministic function of its inputs, so a resumed night rebuilds the same
decisions from the journal's snapshots.
"""

from __future__ import annotations

from autotune.analysis.hold_budget import (
    OPEN_NIGHT_HORIZON_S,
    BeamBudget,
    RecoveryChoice,
    StageSize,
    Unheld,
    checks_reserve_s,
    checks_share,
    choose_recovery,
    expected_stage_beam_s,
    least_check_s,
    plan_night,
    unwatched_until,
)
from autotune.analysis.hold_check import (
    Assessment,
    assess_check,
    lock_before_change,
    noise_row,
    peak_after_change,
    ADOPT_LEVEL,
    holds_as_well,
    recovery_start,
    recovery_after_alarm,
    lock_at_stage_end,
    reference_add,
    reference_value,
)
from autotune.analysis.hold_lock import (
    SIEGMUND_CORRECTION,
    DriftLock,
    HoldSettings,
    Innovation,
    SequentialTest,
    cusum_arl,
    cusum_threshold,
    floor_phase_rad,
    floor_shift_hz,
    known_cubic,
    peak_offset,
    reading_phase_sd,
    step_reading,
    two_pi_pulse_phase_rad,
    two_sided_arl,
)
from autotune.analysis.hold_plan import (
    CheckPlan,
    cusum_chain,
    flag_probability,
    in_control_rechecks,
    in_control_sooner,
    next_check,
    plan_checks,
    readable_z,
    recheck_run_limit,
)
from autotune.analysis.hold_outlook import (
    CONFIRM_WITHIN_S,
    StepOutlook,
    night_outlook,
    outlook_due,
    step_outlook,
)
from autotune.analysis.hold_signal import NoiseModel, SignalModel

__all__ = [
    "SIEGMUND_CORRECTION",
    "cusum_arl",
    "two_sided_arl",
    "cusum_threshold",
    "SequentialTest",
    "Innovation",
    "DriftLock",
    "HoldSettings",
    "NoiseModel",
    "CheckPlan",
    "plan_checks",
    "readable_z",
    "recheck_run_limit",
    "next_check",
    "cusum_chain",
    "flag_probability",
    "in_control_rechecks",
    "in_control_sooner",
    "floor_shift_hz",
    "floor_phase_rad",
    "known_cubic",
    "peak_offset",
    "reading_phase_sd",
    "two_pi_pulse_phase_rad",
    "step_reading",
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
    "ADOPT_LEVEL",
    "holds_as_well",
    "lock_before_change",
    "recovery_start",
    "recovery_after_alarm",
    "lock_at_stage_end",
    "CONFIRM_WITHIN_S",
    "StepOutlook",
    "step_outlook",
    "night_outlook",
    "outlook_due",
]
