"""One stage with the phase lock (:func:`run_guided_stage`): the lock's settings from the config,
every step labelled by its purpose, a retune's verdict, the verification in two halves and the
acceptance.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from autotune.config import RunConfig
from autotune.analysis.fringe import InversionEstimate
from autotune.wire.rig import measurement_shots
from autotune.analysis.guided import LockPrior, LockSettings, PhaseLockSearch
from autotune.progress import count_text
from autotune.analysis.search import PointResult, Strategy
from autotune.analysis.shortfall import finite_or_none
from autotune.run.guard import Budget
from autotune.run.session import Measurement, Session
from autotune.run.replay import measured_estimates
from autotune.run.stage import StageOutcome, StageRun, search_space, verification_shots
from autotune.run.verification import (
    acceptance_bar,
    acceptance_reason,
    bound_text,
    first_half_settles,
    pooled_estimate,
    search_again,
    shortfall_numbers,
)

__all__ = ["GUIDED_LABELS", "lock_settings", "run_guided_stage"]


#: Measurement labels of the phase-lock stage: its proposals' purposes.
GUIDED_LABELS = ("search", "lock", "velocity", "relock", "check", "correct", "verify")


def lock_settings(config: RunConfig, box: Mapping[str, tuple[float, float]]) -> LockSettings:
    """The phase lock's settings from ``[lock]`` and ``[measurement]``."""
    lock = config.lock
    return LockSettings(
        target_shortfall=lock.target_shortfall,
        confidence=config.measurement.confidence,
        still_good_shortfall=lock.still_good_shortfall,
        phase_at_peak_rad=lock.phase_at_peak_rad,
        phase_at_peak_prior_rad=lock.phase_at_peak_prior_rad,
        capture_phase_error_rad=lock.capture_phase_error_rad,
        min_contrast_ratio=lock.min_contrast_ratio,
        bracket_step_hz=min(lock.bracket_step_hz,
                            0.5 * (box["detuning"][1] - box["detuning"][0])),
        velocity_step_fraction=lock.velocity_step_fraction,
        lock_shots_per_phase=lock.lock_shots_per_phase,
        velocity_shots_per_phase=lock.velocity_shots_per_phase,
        ramsey_phases=config.measurement.ramsey_phases,
        drift_prior_hz_per_s=lock.drift_prior_hz_per_s,
    )


def run_guided_stage(session: Session, *, stage: str, box: Mapping[str, tuple[float, float]],
                     budget: Budget, start: Mapping[str, float],
                     prior: Mapping[str, Any] | None = None,
                     check_shots_per_phase: int | None = None,
                     verification_shots_per_phase: int | None = None,
                     observer: Callable[[int, Strategy, Session], None] | None = None,
                     records: Sequence[Mapping[str, Any]] = ()) -> StageOutcome:
    """Run (or resume) one stage with the phase lock (:class:`autotune.analysis.guided.PhaseLockSearch`).

    Every step is one measurement of both fields, labelled by its purpose (``lock``,
    ``velocity``, ``relock``, ``search``, ``check``, ``verify``, ``correct``) and numbered in
    order; the strategy is told the whole estimate of each (inversion, phase shift,
    absorption, contrasts, clock). The stage ends as the strategy decides:

    - a retune measures at the last good set-points first (``check``) and ends ``still_good``
      when the strategy's verdict, from the phase error with the stored slope and the excess
      absorption, says so;
    - otherwise the loop measures the strategy's proposals until its predicted shortfall is
      below the target at the configured confidence (or a budget is spent), then verifies the
      recommendation; a ``correct`` proposal is itself a verification;
    - after a verification the strategy may ask for a correction, measured at the same
      precision, at most ``[lock] max_corrections`` times;
    - when the verified choice's bound still misses the acceptance bar (``[acceptance]
      max_shortfall``, else ``[lock] still_good_shortfall``) and more points could lower it
      (lock and velocity model established, no optimum beyond the box, the budgets not spent),
      the search goes on (decision ``search_again``), then verifies again; only then is a stage
      judged not accepted. A night's retune after a thermal step thus keeps searching within
      its own budget before its recovery counts as failed.

    Parameters
    ----------
    session : Session
    stage : {"calibrate", "retune"}
    box : Mapping[str, (float, float)]
        The search box (velocity in m/s, detuning in Hz).
    budget : Budget
        Hard limits on the points, shots and rig time of the steps before the verification.
    start : Mapping[str, float]
        The first set-points (the nominal 2 pi velocity at zero detuning, or the last good).
    prior : Mapping, optional
        What the last calibration learned (``LockPrior.to_dict()``), for a retune.
    check_shots_per_phase : int, optional
        Shots per field and phase of a retune's check (default: the verification's).
    verification_shots_per_phase : int, optional
        Shots per field and phase of a verification and of a correction (default:
        ``measurement.verification_shots_per_phase``).
    observer : callable, optional
        ``observer(steps, strategy, session)`` after every search step measured, with their
        count (not for steps replayed on a resume; studies).
    records : sequence of journal records
        Records of an earlier attempt of this stage, to resume from (see :func:`run_stage`).
    """
    run = _GuidedStage(session, stage, records, observer,
                       verify_shots=verification_shots(session.config,
                                                       verification_shots_per_phase),
                       check_shots_per_phase=check_shots_per_phase)
    run.begin(box, start, prior, budget)
    run.retell()
    outcome = run.search_and_verify(budget)
    return outcome if outcome is not None else run.conclude()


class _GuidedStage(StageRun):
    """One phase-lock stage as it runs: the lock, the steps measured so far and where the
    stage stands (searching, checking, verifying), shared by the steps of
    :func:`run_guided_stage`."""

    #: The phase lock, built by :meth:`begin` from the box and prior in force.
    lock: PhaseLockSearch

    def __init__(self, session: Session, stage: str, records: Sequence[Mapping[str, Any]],
                 observer: Callable[[int, Strategy, Session], None] | None, *,
                 verify_shots: int, check_shots_per_phase: int | None):
        super().__init__(session, stage, records)
        self.observer = observer
        self.verify_shots = verify_shots
        check_shots = check_shots_per_phase or verify_shots
        self.default_shots = {"check": check_shots, "verify": verify_shots,
                              "correct": verify_shots}
        self.phases = len(session.phases)
        self.order = sorted((key for key in self.replayed.estimate_order
                             if key[0] in GUIDED_LABELS), key=lambda k: k[1])
        self.steps = 0
        self.searched = 0
        self.final: tuple[dict[str, float], InversionEstimate] | None = None
        self.check: InversionEstimate | None = None
        # Verifications (and corrections) since the search last stopped: a verification that
        # misses the acceptance bar sends the stage back to its search while the budget lasts.
        self.verifications = 0
        # A verification is measured in two halves: the first half of one whose second half
        # has not been measured yet (None otherwise). See first_half_settles.
        self.half: Measurement | None = None
        self.first_half_shots = max(1, verify_shots // 2)
        self.stop_reason = ""
        self.verdict_done = False

    def begin(self, box: Mapping[str, tuple[float, float]], start: Mapping[str, float],
              prior: Mapping[str, Any] | None, budget: Budget) -> None:
        """Journal the stage (or, resuming, say what is taken up again), build the lock over
        the box in force (a resume keeps the journaled box, start and prior) and plan the
        progress."""
        session, config, replayed = self.session, self.config, self.replayed
        lock_prior = None if prior is None else LockPrior.from_dict(prior)
        if replayed.header:
            header = replayed.header
            box = {k: (float(v[0]), float(v[1])) for k, v in header["box"].items()}
            start = {k: float(v) for k, v in header["start"].items()}
            lock_prior = None if header.get("prior") is None else \
                LockPrior.from_dict(header["prior"])
            resend = self.resend_ids
            session.decide("resume", f"continuing {self.stage} from {len(self.records)} "
                           f"journal records: {len(self.order)} finished steps told to the "
                           f"strategy again, once each, "
                           f"{count_text(len(resend), 'request')} to ask the rig for again by "
                           f"their msg_id",
                           estimates=len(replayed.estimates), retold=[],
                           steps=[k[1] for k in self.order], resend=resend)
        else:
            session.journal.append("stage", stage=self.stage,
                                   box={k: list(v) for k, v in box.items()},
                                   initial_points=[dict(start)], start=dict(start),
                                   prior=None if lock_prior is None else lock_prior.to_dict(),
                                   budget=budget.__dict__, strategy="phase_lock", seed=self.seed)
        self.lock = PhaseLockSearch(search_space(box),
                                    seed=self.seed_for("strategy"), start=start,
                                    settings=lock_settings(config, box), prior=lock_prior)
        session.plan_progress(self.stage, budget,
                              # A step may take up to step_shots_range's top multiple of its
                              # configured shots (sized from the measured error per shot).
                              step_shots=measurement_shots(self.phases, math.ceil(
                                  self.lock.settings.step_shots_range[1]
                                  * max(config.lock.lock_shots_per_phase,
                                        config.lock.velocity_shots_per_phase))),
                              verify_shots=measurement_shots(self.phases, self.verify_shots),
                              measured=measured_estimates(replayed))

    def retell(self) -> None:
        """Tell the lock every finished step of an earlier attempt once, in order, and take up
        the stage's state (verifications, check, stop) where it was left."""
        replayed = self.replayed
        for key in self.order:
            rec = replayed.estimates[key]
            self.lock.observe(rec["setpoints"], self._result_of(rec, self.measurements.get(key)),
                              purpose=key[0])
            self.steps = key[1] + 1
            verified = key[0] in ("verify", "correct")
            self._note(key[0], self.measurements[key] if verified else None,
                       InversionEstimate.from_dict(rec["estimate"]))
        self.stop_reason = str(replayed.decisions["stop_search"]["reason"]) \
            if "stop_search" in replayed.decisions else ""
        again = replayed.decisions.get("search_again")
        if again is not None and (not self.stop_reason or int(
                replayed.decisions["stop_search"]["seq"]) < int(again["seq"])):
            # The search went on after a verification missed the bar and has not stopped since.
            self.stop_reason = ""
        self.verdict_done = "verdict" in replayed.decisions

    def _result_of(self, rec: Mapping[str, Any], m: Measurement | None) -> PointResult:
        estimate = InversionEstimate.from_dict(rec["estimate"])
        shots = rec.get("shots") or (measurement_shots(self.phases, m.shots_per_phase)
                                     if m is not None else 1)
        return PointResult.from_estimate(estimate, clock_s=rec.get("clock_s"), shots=int(shots))

    def _note(self, label: str, m: Measurement | None, estimate: InversionEstimate) -> bool:
        """Take a told step into the stage's state; True for a search step."""
        if label in ("verify", "correct"):
            assert m is not None
            self._note_final(label, m, estimate)
            return False
        if label == "check":
            self.check = estimate
            return False
        self.searched += 1
        self.final, self.verifications, self.half = None, 0, None
        return True

    def _note_final(self, label: str, m: Measurement, estimate: InversionEstimate) -> None:
        half = self.half
        if label == "verify" and half is not None and half.setpoints == m.setpoints:
            # The second half: the verification is both halves' counts, estimated as one.
            self.final = (dict(m.setpoints), pooled_estimate(
                self.session, half, m, self.seed_for("pooled_verification", m.point)))
            self.half = None
            return
        self.final = (dict(m.setpoints), estimate)
        self.verifications += 1
        self.half = m if label == "verify" and m.shots_per_phase < self.verify_shots else None

    def run_step(self, label: str, setpoints: Mapping[str, float], shots_per_phase: int
                 ) -> InversionEstimate:
        """Measure one step (journaled first unless it was), tell the lock, note it."""
        session, steps = self.session, self.steps
        m = self.measurement(label, steps, setpoints, shots_per_phase)
        estimate = session.measure(m, self.seed_for("phase_lock_step", steps))
        result = PointResult.from_estimate(estimate, clock_s=m.clock_s,
                                           shots=measurement_shots(self.phases,
                                                                   m.shots_per_phase))
        self.lock.observe(m.setpoints, result, purpose=label)
        self.steps += 1
        if self._note(label, m, estimate) and self.observer is not None:
            self.observer(self.searched, self.lock, session)
        return estimate

    def search_and_verify(self, budget: Budget) -> StageOutcome | None:
        """Step until the stage has a verified choice (None), or a retune's check is still
        good (its outcome)."""
        while True:
            pending = next((m for (label, point), m in self.measurements.items()
                            if point == self.steps and label in GUIDED_LABELS), None)
            if pending is not None:
                self.run_step(pending.label, pending.setpoints, pending.shots_per_phase)
                continue
            now = self.session.clock
            if self.stage == "retune" and self.check is not None and not self.verdict_done \
                    and self.final is None:
                outcome = self.judge_check(now)
                if outcome is not None:
                    return outcome
                continue
            if self.final is not None:
                if self.after_verification(now, budget):
                    return None
                continue
            if not self.stop_reason and self.search_step(now, budget):
                continue
            self.verify_recommendation(now)

    def judge_check(self, now: float) -> StageOutcome | None:
        """A retune's verdict on its check; the ``still_good`` outcome, or None to search."""
        session, config, check = self.session, self.config, self.check
        assert check is not None
        verdict = self.lock.verdict(clock_s=now)
        self.verdict_done = True
        session.decide("verdict", verdict.reason, still_good=verdict.still_good,
                       in_range=verdict.in_range, numbers=verdict.to_dict())
        if verdict.still_good and check.inversion < config.min_inversion:
            # A check is accepted as a verification is: its inversion must reach the bar.
            session.decide("check_below_acceptance",
                           f"the check's inversion {check.inversion:.3f} is below "
                           f"[acceptance] min_inversion {config.min_inversion:.3f}: the "
                           "retune searches")
            return None
        if not verdict.still_good:
            return None
        check_m = next(m for (label, _), m in self.measurements.items() if label == "check")
        self.session.ensure_at(check_m.setpoints, "leave the rig at the checked set-points")
        session.decide("still_good", verdict.reason, setpoints=check_m.setpoints,
                       predicted_shortfall=shortfall_numbers(verdict.shortfall))
        return StageOutcome("still_good", dict(check_m.setpoints), check,
                            "check passed", self.searched, session.tally.shots,
                            session.tally.rig_time_s, True, check,
                            predicted_shortfall=shortfall_numbers(verdict.shortfall),
                            reason=f"still good: {verdict.reason}")

    def after_verification(self, now: float, budget: Budget) -> bool:
        """After a verification: its second half, a correction or more search; True when the
        verified choice stands and the stage is judged."""
        session, config, lock = self.session, self.config, self.lock
        assert self.final is not None
        correction = lock.correction(clock_s=now) \
            if self.verifications <= config.lock.max_corrections else None
        if correction is None and self.half is not None and self.second_half():
            return False
        if correction is None:
            again = search_again(lock, config, budget, session, self.final, self.searched,
                                 self.phases)
            if again is None:
                return True
            session.decide("search_again", again, setpoints=self.final[0], points=self.searched)
            self.final, self.verifications, self.stop_reason = None, 0, ""
            return False
        session.decide("correct", correction.reason, setpoints=correction.point,
                       **{"from": self.final[0]})
        self.run_step("correct", correction.point,
                      correction.shots_per_phase or self.default_shots["correct"])
        return False

    def second_half(self) -> bool:
        """Measure a verification's second half unless its first settles the acceptance; True
        when it was measured."""
        session, config, final, half = self.session, self.config, self.final, self.half
        assert final is not None and half is not None
        settled = first_half_settles(self.lock, config, final)
        second = self.verify_shots - half.shots_per_phase
        if settled is None:
            expected = self.lock.expected_after(final[0], second, clock_s=None)
            bar = acceptance_bar(config)
            if bar >= 1.0 or expected.upper <= bar:
                session.decide("verify_second_half", "the first half of the verification "
                               "does not settle the acceptance: its second half "
                               f"({measurement_shots(self.phases, second):,} shots) at the same "
                               "set-points "
                               f"(expected bound after it {expected.upper:.2%})",
                               setpoints=final[0])
                session.expect_verify_rest(0)
                self.run_step("verify", final[0], second)
                return True
            settled = (f"the verification's first half leaves {bound_text(expected)} "
                       f"expected after its second half, above the bar {bar:.1%}: no "
                       "second half")
        session.decide("verify_first_half_settles", settled, setpoints=final[0])
        self.half = None
        return False

    def search_step(self, now: float, budget: Budget) -> bool:
        """Measure the lock's next proposal (True), or decide why the search stops (False)."""
        session, config, lock = self.session, self.config, self.lock
        searched = self.searched
        shortfall = lock.shortfall(clock_s=now)
        bound = bound_text(shortfall)
        hopeless = lock.hopeless(clock_s=now, points_left=budget.max_points - searched,
                                 acceptance_bar=acceptance_bar(config),
                                 min_inversion=config.min_inversion) if searched else None
        if searched and lock.converged(clock_s=now):
            # The one format of a shortfall, as the lock's verdicts print it.
            stop_reason = f"{bound} below the target {config.lock.target_shortfall:.1%}"
            if shortfall.upper > config.lock.target_shortfall:
                stop_reason = (f"{bound}; below the target {config.lock.target_shortfall:.1%} "
                               "without the calibration's velocity term this retune keeps")
        elif hopeless is not None:
            stop_reason = f"{hopeless}; {bound}"
        elif searched >= budget.max_points:
            stop_reason = f"point budget of {budget.max_points} reached; {bound}"
        elif session.tally.rig_time_s >= budget.max_rig_time_s:
            stop_reason = f"rig-time budget {budget.max_rig_time_s:g} s spent; {bound}"
        else:
            proposal = lock.propose(clock_s=now)
            shots = proposal.shots_per_phase or self.default_shots.get(
                proposal.purpose, config.measurement.shots_per_phase)
            if session.tally.shots + measurement_shots(self.phases, shots) > budget.max_shots:
                stop_reason = (f"shot budget {budget.max_shots} would be exceeded by the "
                               f"next step; {bound}")
            else:
                session.journal.append("proposal", point=self.steps, setpoints=proposal.point,
                                       strategy="phase_lock", purpose=proposal.purpose,
                                       reason=proposal.reason, shots_per_phase=shots)
                self.run_step(proposal.purpose, proposal.point, shots)
                return True
        self.stop_reason = stop_reason
        session.decide("stop_search", stop_reason, points=searched,
                       shortfall=shortfall.to_dict(), learned=lock.state(clock_s=now))
        return False

    def verify_recommendation(self, now: float) -> None:
        """Measure the first half of the verification at the lock's recommendation."""
        session, phases = self.session, self.phases
        verify_duration = measurement_shots(phases, self.verify_shots) / \
            session.repetition_rate_hz
        recommendation = self.lock.recommend(clock_s=now + 0.5 * verify_duration)
        chosen = {k: float(v) for k, v in recommendation.point.items()}
        session.decide("recommend", "the phase lock's posterior: detuning where the phase "
                       "shift is at its peak value, velocity of the highest inversion",
                       setpoints=chosen, predicted=finite_or_none(recommendation.value))
        session.expect_verify_rest(measurement_shots(phases,
                                                     self.verify_shots - self.first_half_shots))
        self.run_step("verify", chosen, self.first_half_shots)

    def conclude(self) -> StageOutcome:
        """Leave the rig at the verified choice and judge it: accepted or below acceptance."""
        session, config, lock = self.session, self.config, self.lock
        assert self.final is not None
        chosen, estimate = self.final
        self.session.ensure_at(chosen, "leave the rig at the verified set-points")
        learned = lock.learned_prior(clock_s=session.clock)
        # The stage vouches for its choice only with every observation told, the
        # verification's included: the bound at the chosen set-points now, the lock, the box,
        # the inversion. At the verification's own moment (clock None: the last result's), so
        # that a drift term fitted to a few points is not extrapolated past what was verified.
        final_short = lock.shortfall(clock_s=None, point=chosen)
        # The acceptance bar is the goal itself (still_good_shortfall, 2 %: >= 0.98 of the
        # best); the stop's target_shortfall is stricter to leave room for the drift and the
        # verification.
        max_shortfall = acceptance_bar(config)
        # A bound of 100 % vouches for nothing: such a setting checks the verified inversion
        # only.
        problems = lock.acceptance_problems(chosen, clock_s=None, max_shortfall=max_shortfall) \
            if max_shortfall < 1.0 else []
        if estimate.inversion < config.min_inversion:
            problems.append((f"the verified inversion {estimate.inversion:.3f} is below "
                             f"[acceptance] min_inversion {config.min_inversion:.3f}",
                             "the rig (source, detectors) and [acceptance] min_inversion"))
        accepted = not problems
        reason = acceptance_reason(estimate.inversion, final_short, problems)
        status = "accepted" if accepted else "below_acceptance"
        session.decide(status, reason, setpoints=chosen,
                       learned=None if learned is None else learned.to_dict(),
                       predicted_shortfall=shortfall_numbers(final_short),
                       problems=[p for p, _ in problems])
        outcome = StageOutcome(status, chosen, estimate, self.stop_reason or "verified after a "
                               "correction", self.searched, session.tally.shots,
                               session.tally.rig_time_s, accepted, self.check,
                               predicted_shortfall=shortfall_numbers(final_short), reason=reason)
        return dataclasses.replace(outcome, lock_prior=None if learned is None
                                   else learned.to_dict())
