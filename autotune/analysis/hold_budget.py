"""The hold's beam budget and the size of a recovery (pure).

:class:`BeamBudget` is the ceiling ``HoldSettings.budget_fraction`` of the night's planned rig
time puts on holding; :func:`checks_share` gives the checks their share and :func:`plan_night`
plans them within it; :func:`choose_recovery` makes a recovery the rest cannot pay for smaller
(:class:`StageSize`, :class:`RecoveryChoice`), and :class:`Unheld` counts the rig time so left
unheld. :mod:`autotune.analysis.hold` describes the whole and re-exports these.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, fields, replace
from typing import Any

import numpy as np

from autotune.analysis.guided import LockPrior
from autotune.analysis.hold_check import reference_value
from autotune.analysis.hold_lock import DriftLock, HoldSettings
from autotune.analysis.hold_plan import RECOVERY_PRIOR_S, CheckPlan, plan_checks
from autotune.analysis.hold_signal import NoiseModel, SignalModel
from autotune.wire.rig import measurement_shots

__all__ = [
    "OPEN_NIGHT_HORIZON_S",
    "BeamBudget",
    "least_check_s",
    "checks_reserve_s",
    "checks_share",
    "checks_share_at",
    "expected_stage_beam_s",
    "plan_night",
    "unwatched_until",
    "StageSize",
    "RecoveryChoice",
    "choose_recovery",
    "Unheld",
]

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
# night's retunes (:data:`RECOVERY_PRIOR_S`), and the plan states whether the rest pays for them.
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
    return (measurement_shots(settings.ramsey_phases, settings.min_shots_per_phase)
            / settings.repetition_rate_hz)


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
    rate = (recoveries + 1.0) / (budget.elapsed_s + RECOVERY_PRIOR_S)
    reserve = rate * ahead * max(recovery_beam_s, 0.0)
    allowance = (budget.left_s - reserve) / ahead
    share = min(_CHECK_SHARE * budget.fraction, budget.left_s / ahead)
    return {"share": share, "allowance": allowance, "remaining_s": ahead,
            "reserve_s": reserve, "recoveries_left_s": max(budget.left_s - share * ahead, 0.0),
            "recoveries_per_h": rate * 3600.0,
            "recovery_beam_s": recovery_beam_s, "holding_beam_s": budget.spent_s,
            "left_s": budget.left_s, "ceiling_s": budget.ceiling_s}


def checks_share_at(share: Mapping[str, float], fraction_now: float, fraction: float) -> float:
    """The checks' share :func:`checks_share` would have given, at the same moment of the same
    night, with ``budget_fraction`` ``fraction`` in place of ``fraction_now`` (``share`` its
    numbers at ``fraction_now``): the ceiling scales with the fraction, the beam already spent
    does not, so a night whose share is what is left of the ceiling needs less than the share's
    own ratio suggests."""
    ceiling = float(share["ceiling_s"]) * float(fraction) / float(fraction_now)
    left = max(ceiling - float(share["holding_beam_s"]), 0.0)
    return min(_CHECK_SHARE * float(fraction), left / float(share["remaining_s"]))


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
        check = measurement_shots(phases, self.check_shots_per_phase)
        verify = measurement_shots(phases, self.verification_shots_per_phase)
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
        step = measurement_shots(phases, max(check, per_phase))
        for corrections in range(size.max_corrections, -1, -1):
            verify = (1 + corrections) * measurement_shots(phases, per_phase)
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
