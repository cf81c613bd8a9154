"""One night's state machine (:class:`Night`, see :mod:`autotune.run.track`): the tail of
the journal read for a resume, the stages and the recoveries, the plan of the checks within
the budget, holding, the end and the result."""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping
from typing import Any

import structlog

from autotune.errors import JournalError, RigError
from autotune.analysis.fringe import InversionEstimate
from autotune.analysis.guided import LockPrior
from autotune.analysis.hold import (
    BeamBudget,
    CheckPlan,
    DriftLock,
    NoiseModel,
    RecoveryChoice,
    StageSize,
    Unheld,
    assess_check,
    choose_recovery,
    next_check,
    noise_row,
    lock_at_stage_end,
    plan_night,
    night_outlook,
    outlook_due,
    recovery_after_alarm,
    holds_as_well,
    reference_add,
    reference_value,
    unwatched_until,
)
from autotune.run.journal import utc_now, write_json_atomic
from autotune.run.records import (Decision, Hold, MeasurementOpened, Start, decisions, of_type,
                                  parse_all)
from autotune.run.guard import Budget, holds_setpoints, retune_box
from autotune.run.guided_stage import run_guided_stage
from autotune.run.replay import replay_records
from autotune.run.session import Measurement, Session
from autotune.run.stage import StageOutcome, child_seed
from autotune.progress import NightProgress, setpoints_text
from autotune.wire.rig import Rig, measurement_shots
from autotune.analysis.search import PointResult
from autotune.run.night_settings import (
    PreparedNight,
    expected_stage_s,
    hold_settings,
    planned_stage,
)
from autotune.run.night_ledger import (
    HOLD,
    NightLedger,
    json_ready,
    stage_begun,
    stage_estimates,
    stage_outcome,
    stage_records,
)
from autotune.run.night_clock import NightClock, parse_wall

__all__ = ["Night"]

_log = structlog.get_logger(__name__)

# How many measurements the noise model remembers, and how many checks the change-point
# estimate may look back over.
_NOISE_MEMORY = 24
_RECENT = 16
# The plan is made again after this much rig time (s).
_REPLAN_S = 3600.0
# Snapshots: the records that carry the night's whole state.
_SNAPSHOT_DECISIONS = ("plan", "failure", "unwatched")

class Night:
    """One night's state machine (see the module notes)."""

    def __init__(self, session: Session, prepared: PreparedNight, rig: Rig, ledger: NightLedger,
                 wall: Callable[[], float]) -> None:
        self.session = session
        self.prepared = prepared
        self.config = prepared.config
        self.rig = rig
        self.ledger = ledger
        self.wall = wall
        self.settings = hold_settings(self.config, prepared.description)
        self.simulated = bool(getattr(prepared.description, "simulated", False)) and \
            callable(getattr(rig, "advance", None))
        records = list(ledger.records)
        typed = parse_all(records)
        start = of_type(typed, Start)[0]
        if start.clock is None:
            raise JournalError(f"journal record {start.seq}: the night's start has no rig clock")
        self.start_clock = start.clock
        self.start_wall = parse_wall(start.t_wall) or wall()
        snapshot = None
        for index in range(len(typed) - 1, -1, -1):
            rec = typed[index]
            if isinstance(rec, Hold) or (isinstance(rec, Decision)
                                         and rec.what in _SNAPSHOT_DECISIONS):
                snapshot = index
                break
        self.state: dict[str, Any] | None = None
        # The records after the last snapshot (those this process writes included): how far
        # the next step went.
        self._tail_start = 0
        if snapshot is not None:
            self.state = dict(records[snapshot]["state"])
            self._tail_start = snapshot + 1
        self.resumed = bool(prepared.resume)
        self.clock = NightClock(session, rig, self.config, ledger, start_clock=self.start_clock,
                                 start_wall=self.start_wall, simulated=self.simulated,
                                 wall=wall, find=self._find, tell=self._tell)
        self.log = _log.bind(run=prepared.run_dir.name)

    # -- records of the tail (resume) ------------------------------------------------------

    @property
    def tail(self) -> list[Mapping[str, Any]]:
        """The records after the last snapshot."""
        return self.ledger.records[self._tail_start:]

    def _find(self, kind: str, **match: Any) -> Mapping[str, Any] | None:
        for raw, rec in zip(self.tail, parse_all(self.tail), strict=True):
            if rec.type != kind:
                continue
            if all(rec.get(k) == v for k, v in match.items()):
                return raw
        return None

    def _snapshot(self, kind: str, **fields: Any) -> None:
        """Write a record carrying the whole state; the tail of a resume is done with."""
        state = json_ready(self.state)
        if kind == "hold":
            self.ledger.append("hold", state=state, **json_ready(fields))
        else:
            self.session.decide(kind, fields.pop("reason"), state=state, **json_ready(fields))
        self._tail_start = len(self.ledger.records)

    # -- the night ---------------------------------------------------------------------------

    def run(self) -> dict[str, Any]:
        """Hold until the night ends; the result."""
        if self.resumed:
            self.session.decide("resume", f"continuing the night from its journal "
                                f"({'no snapshot yet' if self.state is None else 'last snapshot'}"
                                f", {len(self.tail)} records after it)", retold=[])
        if self.state is None:
            self.state = self._begin()
        while True:
            self._complete_pending()
            # Work a killed process left half done (a stage begun, a check measured in part)
            # is finished before the end of the night is looked at: its requests are resolved
            # and the rig left at a verified setting.
            if self._in_flight() is None:
                reason = self.clock.end_reason()
                if reason is not None:
                    return self._finish(reason, "ended")
            mode = self.state["mode"]
            if mode == "recover":
                self._recover()
                if self.state["mode"] == "stopped":
                    return self._finish(self.state["stop_reason"], "gave_up")
                continue
            if mode == "unwatched":
                until = float(self.state["resume_clock"])
                self.clock.wait_until(self.clock.bounded(until), "no check the budget can pay for",
                                 unwatched=int(self.state["point"]))
                if self.clock.end_reason() is not None:
                    continue
                if self.state.get("to_end"):
                    # The end of the night in wall time has not come with the rig's clock.
                    self._unwatched("the budget still cannot pay for a check")
                    continue
                self.state = {**self.state, "mode": "hold", "starved": False, "next": None}
                self._replan("the budget affords a check again")
                continue
            if mode == "retry":
                due = float(self.state["retry_clock"])
                self.clock.wait_until(self.clock.bounded(due), "retry the recovery after a failure",
                                 retry=int(self.state["failures"]))
                if self.clock.end_reason() is not None:
                    continue
                self.state = {**self.state, "mode": "recover"}
                continue
            # The hourly plan waits for a recheck run to end: the run's statistics are read
            # against the thresholds and the shots it began with (a plan made inside it would
            # change both, and drop the run's count of rechecks). Nor is it made inside a check
            # a killed process left measured in part: a night not killed looks at the hour only
            # before it waits for a check, and the plan's snapshot would leave the check's
            # records behind (never finished, its acquisitions never estimated).
            if self.session.clock >= float(self.state["replan_clock"]) and \
                    not (self.state.get("next") or {}).get("recheck") and \
                    self._in_flight() is None:
                self._replan("an hour of rig time since the last plan")
                continue
            self._hold_once()

    def _in_flight(self) -> str | None:
        """``"stage"`` or ``"check"`` when the journal's tail holds one begun and not finished."""
        tail = parse_all(self.tail)
        begun = {index for r in tail if (index := stage_begun(r)) is not None}
        done = {r.get("index") for r in decisions(tail, "stage_done")}
        if begun - done:
            return "stage"
        if self.state is not None and self.state.get("mode") == "hold" and self.state.get("next"):
            point = self.state["next"]["point"]
            if any(r.label == HOLD and r.point == point
                   for r in of_type(tail, MeasurementOpened)):
                return "check"
        return None

    # -- the beginning ---------------------------------------------------------------------------

    def _begin(self) -> dict[str, Any]:
        """The state before the first stage (no snapshot in the journal yet)."""
        config = self.config
        good = self.prepared.last_good
        begun = self._find("decision", what="retune", index=0) or \
            self._find("decision", what="calibrate", index=0)
        noise: list[list[float]] = []
        if begun is not None:
            kinds = [begun["what"]] + (["calibrate"] if begun["what"] == "retune" else [])
            start = dict(begun["start"])
            prior = begun.get("prior")
            reason = "start of the night (resumed)"
        elif good is not None and good.get("lock_prior") is not None:
            kinds = ["retune", "calibrate"]
            start = {sp.name: float(good["setpoints"][sp.name]) for sp in config.setpoints}
            prior = good["lock_prior"]
            reason = (f"start of the night: the guided retune from the last good calibration of "
                      f"{good.get('t_wall', '?')} ({good.get('run_dir', '?')})")
        else:
            kinds = ["calibrate"]
            start = {}
            prior = None
            reason = ("start of the night: no last good calibration" if good is None else
                      "start of the night: the last good calibration has no lock prior (made "
                      "without the phase lock)") + "; a calibration first"
        rate, rate_sd = 0.0, float(config.lock.drift_prior_hz_per_s)
        if prior is not None:
            rate = float(LockPrior.from_dict(prior).peak_drift_hz_per_s)
        return {"mode": "recover", "failures": 0, "stages": 0, "point": 0,
                "recover": {"kinds": kinds, "start": start, "prior": prior, "reason": reason,
                            "first_index": 0},
                "rate": {"rate_hz_per_s": rate, "rate_stderr_hz_per_s": rate_sd},
                "noise": noise, "counts": {"checks": 0, "rechecks": 0, "corrections": 0,
                                            "alarms": 0, "retunes": 0, "calibrations": 0,
                                            "failures": 0, "stages_accepted": 0},
                "held": None, "recent": []}

    # -- stages ----------------------------------------------------------------------------------

    def _stage(self, kind: str, index: int, start: Mapping[str, float],
               prior: Mapping[str, Any] | None, reason: str, *,
               size: StageSize | None = None) -> dict[str, Any]:
        """Run (or resume, or read back) stage ``index``; its outcome as a plain dict.

        ``size`` bounds its shots (the budget's choice); None keeps the configured sizes.
        """
        done = self._find("decision", what="stage_done", index=index)
        if done is not None:
            self.state["counts"]["retunes" if kind == "retune" else "calibrations"] += 1
            return dict(done["outcome"])
        config, session = self.config, self.session
        s, r = config.search, config.retune
        if kind == "retune":
            box = retune_box(config, start, session.limits)
            budget = Budget(r.max_points, r.max_shots, s.max_rig_time_s, 1)
            shots = {"check_shots_per_phase": config.track.retune_shots_per_phase,
                     "verification_shots_per_phase": config.track.retune_shots_per_phase}
        else:
            box = {sp.name: (sp.search_min, sp.search_max) for sp in config.setpoints}
            nominal = {"velocity": config.nominal.two_pi_velocity, "detuning": 0.0}
            start = {name: min(max(nominal.get(name, (lo + hi) / 2), lo), hi)
                     for name, (lo, hi) in box.items()}
            budget = Budget(s.max_points, s.max_shots, s.max_rig_time_s, s.min_points)
            shots = {}
            prior = None
        begun = self._find("decision", what=kind, index=index)
        # The snapshot the state came from predates this stage: count it once here.
        self.state["counts"]["retunes" if kind == "retune" else "calibrations"] += 1
        if begun is None:
            session.decide(kind, reason, index=index, start=dict(start),
                           box={k: list(v) for k, v in box.items()}, prior=prior,
                           size=None if size is None else size.to_dict())
        else:
            start = {k: float(v) for k, v in begun["start"].items()}
            box = {k: (float(v[0]), float(v[1])) for k, v in begun["box"].items()}
            prior = begun.get("prior")
            size = None if begun.get("size") is None else StageSize.from_dict(begun["size"])
        lock_config = config.lock
        if size is not None:
            budget = dataclasses.replace(budget, max_shots=size.max_shots,
                                         max_points=min(budget.max_points, size.max_points))
            shots = {"check_shots_per_phase": size.check_shots_per_phase or None,
                     "verification_shots_per_phase": size.verification_shots_per_phase}
            lock_config = dataclasses.replace(config.lock, max_corrections=size.max_corrections)
        records = stage_records(self.tail, index)
        outcome = stage_outcome(records, prior)
        if outcome is None:
            # Each stage of the night draws its own child seeds.
            base = config
            session.config = dataclasses.replace(config, lock=lock_config, search=dataclasses.replace(
                config.search, seed=child_seed(config.search.seed, 9, index)))
            try:
                result: StageOutcome = run_guided_stage(
                    session, stage=kind, box=box, budget=budget, start=start, prior=prior,
                    records=records, **shots)
                session.finish_progress()
            finally:
                session.config = base
                session.end_progress()
            last = self.ledger.last_estimate or {}
            outcome = {"status": result.status,
                       "accepted": bool(result.accepted),
                       "setpoints": dict(result.setpoints),
                       "estimate": result.estimate.to_dict(),
                       "clock_s": last.get("clock_s", session.clock),
                       "lock_prior": result.lock_prior if result.lock_prior is not None else prior}
        outcome["kind"] = kind
        outcome["noise"] = [noise_row(rec["estimate"], int(rec.get("shots") or 0))
                            for rec in stage_estimates(self.ledger.records, index,
                                                         self.config.measurement.ramsey_phases)]
        session.decide("stage_done", f"{kind} {index}: {outcome['status']} at "
                       + setpoints_text(outcome["setpoints"]),
                       index=index, outcome=json_ready(outcome))
        return outcome

    def _recover(self) -> None:
        """Run the recovery chain of the state (retune, then calibration) to its end."""
        chain = self.state["recover"]
        alarm = chain.get("alarm")
        if alarm is not None and self._find("decision", what="alarm", point=alarm["point"]) is None:
            self.session.decide("alarm", alarm["reason"], point=alarm["point"],
                                statistic=alarm["statistic"], value=alarm["value"],
                                threshold=alarm["threshold"])
        index = int(chain["first_index"])
        for position, kind in enumerate(chain["kinds"]):
            begun = self._find("decision", what=kind, index=index + position) is not None
            if position > 0 and self._adopt(index + position - 1):
                return
            if position > 0 and not begun and self.clock.end_reason() is not None:
                return  # the night's end came: no new stage (the main loop stops the night)
            choice = self._choose(kind, index + position, chain)
            if choice is not None and choice.action in ("correct", "hold"):
                if self._compromise(choice, chain):
                    return
                continue
            start = chain["start"] if kind == "retune" else {}
            outcome = self._stage(kind, index + position, start, chain.get("prior"),
                                  chain["reason"] if position == 0 else
                                  f"the retune was not accepted ({chain['reason']}): a calibration",
                                  size=None if choice is None else choice.size)
            self.state["stages"] = max(int(self.state["stages"]), index + position + 1)
            # The one place where a stage's outcome decides: accepted with a lock prior, the
            # night holds there; anything else (not accepted) is a failed recovery.
            if outcome["accepted"] and outcome.get("lock_prior") is not None:
                self._resume_holding(outcome)
                return
        if self._adopt(index + len(chain["kinds"]) - 1):
            return
        self.state["counts"]["failures"] += 1
        failures = int(self.state["failures"]) + 1
        limit = self.config.track.max_consecutive_failures
        held = self.state.get("held")
        start = held or chain["start"]
        interval = float((self.state.get("plan") or {}).get("interval_s")
                         or self.config.track.max_interval_s)
        retry = self.session.clock + interval
        self.state = {**self.state, "failures": failures,
                      "recover": {"kinds": ["retune", "calibrate"] if start else ["calibrate"],
                                  "start": start, "prior": chain.get("prior"),
                                  "reason": f"retry after {failures} failed recover"
                                            f"{'y' if failures == 1 else 'ies'}",
                                  "first_index": int(self.state["stages"])}}
        if failures >= limit:
            why = (f"{failures} recoveries in a row failed, each not accepted or accepted "
                   f"without a lock prior (track.max_consecutive_failures = {limit})")
            self.state.update(mode="stopped", stop_reason=why)
            self._snapshot("failure", reason=why, failures=failures)
            return
        self.state.update(mode="retry", retry_clock=retry)
        self._snapshot("failure", reason=f"recovery {failures} not accepted; trying again at rig "
                       f"clock {retry:.0f} s", failures=failures)

    def _adopt(self, index: int) -> bool:
        """Hold the point of stage ``index``, a retune not accepted, when its verification is
        not significantly below the night's reference (:func:`holds_as_well`; at the night's
        start, the last good calibration's inversion): an ``adopt`` decision with its numbers,
        then the checks and the lock go on from there, with no further stage and no beam. The
        night's reference and its last good calibration are kept. False (and nothing done) for
        any other stage."""
        done = self._find("decision", what="stage_done", index=index)
        if done is None or done["outcome"].get("kind") != "retune" or done["outcome"]["accepted"]:
            return False
        outcome = done["outcome"]
        if outcome.get("lock_prior") is None or outcome.get("estimate") is None:
            return False
        estimate = InversionEstimate.from_dict(outcome["estimate"])
        if self.state.get("reference"):
            reference, reference_sd = reference_value(self.state["reference"])
            against = "the night's reference"
        else:
            good = self.prepared.last_good or {}
            if good.get("inversion") is None or good.get("inversion_low") is None:
                return False
            reference = float(good["inversion"])
            reference_sd = (float(good["inversion_high"]) - float(good["inversion_low"])) / (
                2.0 * 1.959963984540054)
            against = "the last good calibration's"
        test = holds_as_well(estimate.inversion, estimate.inversion_stderr, reference,
                             reference_sd, min_inversion=self.config.min_inversion)
        if not test["holds"]:
            return False
        if self._find("decision", what="adopt", index=index) is None:
            self.session.decide(
                "adopt", f"retune {index} was not accepted ({outcome['status']}) but verified "
                f"inversion {estimate.inversion:.3f} +- {estimate.inversion_stderr:.3f}, not "
                f"below {against} {reference:.3f} +- {reference_sd:.3f} (z {test['z']:+.2f}, p "
                f"{test['p']:.3f} >= {test['level']}; at least [acceptance] min_inversion "
                f"{test['min_inversion']:.3f}): held at "
                f"{setpoints_text(outcome['setpoints'])} without a further stage; the checks "
                f"go on from there", index=index, test=json_ready(test))
        self._resume_holding(outcome, store=False)
        return True

    def _choose(self, kind: str, index: int, chain: Mapping[str, Any]) -> RecoveryChoice | None:
        """The size of stage ``index`` within the budget (a ``budget`` decision when the budget
        made it smaller or put something cheaper in its place); None for the calibration a
        night begins with (not holding) and for a stage already begun (its own record)."""
        if self._find("decision", what=kind, index=index) is not None:
            return None
        if index == 0 and kind == "calibrate":
            return None
        journaled = self._find("decision", what="budget", index=index)
        if journaled is not None:
            data = dict(journaled["choice"])
            data["size"] = None if data["size"] is None else StageSize.from_dict(data["size"])
            return RecoveryChoice(**data)
        peak = chain.get("peak")
        choice = choose_recovery(self.settings, kind=kind, planned=planned_stage(self.config, kind),
                                 budget=self._budget(), expected_s=self._expected_s(kind),
                                 peak=None if peak is None else (float(peak[0]), float(peak[1])))
        if choice.limited:
            self.session.decide("budget", choice.reason, index=index, kind=kind,
                                action=choice.action, choice=json_ready(choice.to_dict()),
                                budget=json_ready(self._budget().to_dict()))
        return choice

    def _compromise(self, choice: RecoveryChoice, chain: Mapping[str, Any]) -> bool:
        """Hold on without a stage, the budget having none to pay for: the detuning corrected to
        the checks' estimate of the peak (``correct``) or kept; the lock and the test start
        again there. False when the night holds nothing yet (no stage ever accepted)."""
        held = self.state.get("held")
        if not held or not self.state.get("prior"):
            return False
        clock = self.session.clock
        target = dict(held)
        lock = DriftLock.from_dict(self.state["lock"]).predict(clock)
        if choice.action == "correct" and choice.target_hz is not None:
            limit = self.session.limits["detuning"]
            target["detuning"] = min(max(float(choice.target_hz), limit.min), limit.max)
            peak = chain.get("peak") or [target["detuning"], self.settings.max_correction_hz]
            lock = DriftLock.start(clock, target["detuning"], max(float(peak[1]), 1.0),
                                   lock.rate_hz_per_s, lock.rate_stderr_hz_per_s,
                                   self.settings.walk_hz_per_sqrt_s)
        point = int(self.state["point"])
        pending = None
        if not holds_setpoints(target, held):
            self.state["counts"]["corrections"] += 1
            pending = {"kind": "correct", "point": point, "from": dict(held), "to": target,
                       "reason": choice.reason}
        unheld = Unheld.from_dict(self.state.get("unheld")).begin(clock)
        self.state = {**self.state, "mode": "hold", "failures": 0, "held": target,
                      "lock": lock.to_dict(), "pending": pending, "next": None, "recent": [],
                      "tests": {"upper": 0.0, "lower": 0.0, "inversion": 0.0},
                      "unheld": unheld.to_dict()}
        self._replan(f"after the budget's {choice.action} in place of a {choice.kind}")
        return True

    def _unwatched(self, why: str) -> None:
        """No check can be paid for: hold the set-points without checks until the budget allows
        one again (a night without an end) or the night ends."""
        budget = self._budget()
        clock = self.session.clock
        until = unwatched_until(self.settings, budget, clock_s=clock,
                                start_clock_s=self.start_clock)
        self.state = {**self.state, "mode": "unwatched", "resume_clock": until,
                      "to_end": budget.remaining_s is not None,
                      "unheld": Unheld.from_dict(self.state.get("unheld")).begin(clock).to_dict()}
        self._snapshot("unwatched", reason=f"{why}: {budget.left_s:.0f} s of beam left of the "
                       f"{budget.ceiling_s:.0f} s ceiling; the set-points are held without checks "
                       + ("until the night ends" if budget.remaining_s is not None else
                          f"until rig clock {until:.0f} s, when the ceiling affords one again"),
                       budget=budget.to_dict())

    def _resume_holding(self, outcome: Mapping[str, Any], *, store: bool = True) -> None:
        """Hold from an accepted stage: reset the lock and the test there, store it, plan. With
        ``store`` False (a point held though not accepted, :meth:`_adopt`), neither stored nor
        counted as accepted, and the night's reference is kept."""
        prior = LockPrior.from_dict(outcome["lock_prior"])
        estimate = InversionEstimate.from_dict(outcome["estimate"])
        setpoints = {k: float(v) for k, v in outcome["setpoints"].items()}
        clock = float(outcome.get("clock_s") or self.session.clock)
        lock = lock_at_stage_end(self.settings, prior, estimate, detuning_hz=setpoints["detuning"],
                                 clock_s=clock, rate=self.state["rate"])
        noise = list(self.state.get("noise") or []) + [list(x) for x in outcome.get("noise", [])]
        self.state = {**self.state, "mode": "hold", "failures": 0, "held": setpoints,
                      "prior": prior.to_dict(), "lock": lock.to_dict(),
                      # The inversion watch's reference: precision-weighted mean of the stage's
                      # last measurement and the checks since (self-starting).
                      "reference": self.state["reference"] if not store and self.state.get(
                          "reference") else reference_add({"weight": 0.0, "weighted": 0.0},
                                                          estimate.inversion,
                                                          estimate.inversion_stderr),
                      "tests": {"upper": 0.0, "lower": 0.0, "inversion": 0.0},
                      "noise": noise[-_NOISE_MEMORY:], "recent": [], "pending": None,
                      "next": None, "unheld": Unheld.from_dict(self.state.get("unheld")).end(
                          self.session.clock).to_dict()}
        if store:
            self.state["counts"]["stages_accepted"] += 1
            self._store(outcome, estimate)
        self._replan(f"after the {outcome['kind']} ({outcome['status']})")

    def _store(self, outcome: Mapping[str, Any], estimate: InversionEstimate) -> None:
        write_json_atomic(self.prepared.store, {
            "setpoints": dict(outcome["setpoints"]), "inversion": estimate.inversion,
            "inversion_low": estimate.inversion_low, "inversion_high": estimate.inversion_high,
            "run_dir": str(self.prepared.run_dir), "t_wall": utc_now(),
            "rig": self.prepared.description.rig, "lock_prior": outcome["lock_prior"]})

    # -- the plan ---------------------------------------------------------------------------------

    def _budget(self) -> BeamBudget:
        """The night's beam on holding against its ceiling, now."""
        return BeamBudget.of(self.settings, elapsed_s=self.session.clock - self.start_clock,
                             remaining_s=self.clock.remaining_s(),
                             spent_s=self.ledger.holding_beam_s)

    def _expected_s(self, kind: str) -> float:
        # The recoveries' own cost: the stage the night began with is not one.
        spent = [beam for index, beam in self.ledger.stage_beam_s.items()
                 if index > 0 and self.ledger.stage_kind.get(index) == kind]
        return expected_stage_s(self.config, spent, kind, self.settings.repetition_rate_hz)

    def _replan(self, why: str) -> None:
        state = self.state
        plan, budget = plan_night(
            self.settings, budget=self._budget(), rows=state["noise"],
            prior=LockPrior.from_dict(state["prior"]),
            lock=DriftLock.from_dict(state["lock"]).predict(self.session.clock),
            reference=state["reference"], recovery_beam_s=self._expected_s("retune"),
            recoveries=max(self.ledger.stages_begun - 1, 0))
        if plan is None:
            self._unwatched("the budget has nothing left for a check")
            return
        latest = self._outlook(latest=True)
        if outlook_due(latest, plan):
            self._tell_outlook(plan, budget, later=latest is not None)
        share = budget["share"]
        point = int(state["point"])
        nxt = state.get("next")
        # After a stage the first check comes one interval later (the stage has just measured);
        # a plan made again on the hour keeps the next check's time and takes the new shots.
        due = self.session.clock + plan.interval_s if nxt is None else float(nxt["due_clock"])
        self.state = {**state, "plan": plan.to_dict(),
                      "next": {"point": point, "due_clock": due, "recheck": False,
                               "shots_per_phase": plan.shots_per_phase},
                      "replan_clock": self.session.clock + _REPLAN_S}
        self._snapshot("plan", reason=f"{why}: {plan.reason}; the checks may take {share:.1%} "
                       f"of the beam (budget {self.settings.budget_fraction:.0%}, a ceiling of "
                       f"{budget['ceiling_s'] / 60:.1f} min, {budget['holding_beam_s'] / 60:.1f} "
                       f"min spent, "
                       f"{budget['recoveries_left_s'] / 60:.1f} min left for recoveries, "
                       f"{budget['reserve_s'] / 60:.1f} min for those expected in the "
                       f"{budget['remaining_s'] / 3600:.1f} h to come)",
                       budget=budget, night_rig_time_s=self.session.clock - self.start_clock,
                       plan=plan.to_dict())

    def _outlook(self, latest: bool = False) -> Mapping[str, Any] | None:
        """The numbers of the night's first ``step_outlook`` decision (its last with
        ``latest``), None before its first plan."""
        told = decisions(parse_all(self.ledger.records), "step_outlook")
        return told[-1 if latest else 0].get("outlook") if told else None

    def _tell_outlook(self, plan: CheckPlan, budget: Mapping[str, float], *,
                      later: bool = False) -> None:
        """Before the night's first check, and again at a later plan whose time to confirm has
        crossed ``hold.CONFIRM_WITHIN_S`` either way (``later``; :func:`outlook_due`): how long
        its checks take to confirm a thermal step from this rig's measured signal and what is
        left of the budget, journaled with its numbers, a warning naming what to change when
        that is over. The night still runs as configured."""
        state = self.state
        outlook = night_outlook(self.settings, plan=plan, share=budget, rows=state["noise"],
                                prior=LockPrior.from_dict(state["prior"]),
                                lock=DriftLock.from_dict(state["lock"]).predict(
                                    self.session.clock),
                                reference=state["reference"])
        hours = (self.session.clock - self.start_clock) / 3600.0
        when = f"{hours:.1f} h into the night, " if later else ""
        numbers = json_ready({**outlook.to_dict(), "later": later})
        if outlook.met:
            self.session.decide("step_outlook", when + outlook.reason, outlook=numbers)
        else:
            # The reason is the one line the console shows; the whole sentence is its detail.
            self.session.decide("step_outlook", when + outlook.warning, level="warning",
                                detail=outlook.reason, outlook=numbers)

    # -- holding ------------------------------------------------------------------------------------

    def _complete_pending(self) -> None:
        """Finish a correction or an alarm decided by the last check (resume-safe)."""
        pending = self.state.get("pending")
        if not pending:
            return
        if pending["kind"] == "correct":
            if self._find("decision", what="correct", point=pending["point"]) is None:
                self.session.decide("correct", pending["reason"], point=pending["point"],
                                    setpoints=pending["to"], **{"from": pending["from"],
                                                                "to": pending["to"]})
            self.session.ensure_at(pending["to"], reason=f"lock correction after check "
                                                         f"{pending['point']}")
        self.state = {**self.state, "pending": None}

    def _hold_once(self) -> None:
        state = self.state
        nxt = state["next"]
        point = int(nxt["point"])
        held = {k: float(v) for k, v in state["held"].items()}
        self.session.ensure_at(held, reason="back to the held set-points")
        if self._in_flight() != "check":
            self.clock.wait_until(self.clock.bounded(float(nxt["due_clock"])),
                             "the next check" + (" (recheck)" if nxt.get("recheck") else
                                                 " (sooner)" if nxt.get("sooner") else ""),
                             point=point)
            if self.clock.end_reason() is not None:
                return
            check_s = measurement_shots(self.settings.ramsey_phases, int(nxt["shots_per_phase"])) / \
                self.settings.repetition_rate_hz
            if not self._budget().affords(check_s):
                # The ceiling first: a plan within what is left, else no more checks.
                if state.get("starved"):
                    self._unwatched(f"the budget cannot pay for a check of {check_s:.0f} s")
                else:
                    self.state = {**state, "starved": True, "next": None}
                    self._replan(f"the budget left cannot pay for the next check of "
                                 f"{check_s:.0f} s")
                return
        estimate, m = self._measure(point, held, int(nxt["shots_per_phase"]))
        self._assess(point, estimate, m)

    def _measure(self, point: int, held: Mapping[str, float], shots_per_phase: int
                 ) -> tuple[InversionEstimate, Measurement]:
        session = self.session
        mine = [r for r in self.tail if r.get("label") == HOLD and r.get("point") == point]
        replayed = replay_records(mine)
        key = (HOLD, point)
        m = replayed.measurements.get(key)
        if m is None:
            m = Measurement(HOLD, point, dict(held), shots_per_phase)
            self.ledger.append("measurement", label=HOLD, point=point, setpoints=dict(held),
                               shots_per_phase=shots_per_phase)
        if key in replayed.estimates:
            return InversionEstimate.from_dict(replayed.estimates[key]["estimate"]), m
        estimate = session.measure(m, child_seed(self.config.search.seed, 7, point))
        return estimate, m

    def _assess(self, point: int, estimate: InversionEstimate, m: Measurement) -> None:
        state = self.state
        settings = self.settings
        prior = LockPrior.from_dict(state["prior"])
        plan = CheckPlan.from_dict(state["plan"])
        lock = DriftLock.from_dict(state["lock"])
        tests = state["tests"]
        held = {k: float(v) for k, v in state["held"].items()}
        shots = measurement_shots(len(self.session.phases), m.shots_per_phase)
        result = PointResult.from_estimate(estimate, clock_s=m.clock_s, shots=shots)
        limit = self.session.limits["detuning"]
        pooled = NoiseModel.from_estimates([(r[0], r[1], int(r[2])) for r in state["noise"]])
        previous = state["recent"][-1] if state["recent"] else None
        a = assess_check(settings, result=result, detuning_hz=held["detuning"], lock=lock,
                         prior=prior, plan=plan, upper=float(tests["upper"]),
                         lower=float(tests["lower"]), inversion=float(tests["inversion"]),
                         reference_inversion=reference_value(state["reference"])[0],
                         reference_stderr=reference_value(state["reference"])[1],
                         next_interval_s=plan.interval_s, noise=pooled,
                         previous_unusable=previous is not None and previous["peak_hz"] is None
                         and previous.get("point") == point - 1,
                         limits=(limit.min, limit.max))
        counts = dict(state["counts"])
        counts["checks"] += 1
        noise = list(state["noise"]) + [noise_row(estimate.to_dict(), shots)]
        recent = list(state["recent"]) + [{
            "point": point, "clock_s": m.clock_s, "peak_hz": a.peak_hz if a.usable else None,
            "variance_hz2": a.peak_variance_hz2 if a.usable else None,
            "upper": a.upper, "lower": a.lower, "lock_before": lock.to_dict()}]
        clock_now = self.session.clock
        reference = state["reference"]
        if a.action != "alarm":
            reference = reference_add(reference, estimate.inversion,
                                       math.sqrt(pooled.inversion_variance_shots / shots))
        new = {**state, "lock": a.lock.to_dict(), "counts": counts, "reference": reference,
               "tests": {"upper": a.upper, "lower": a.lower, "inversion": a.inversion},
               "noise": noise[-_NOISE_MEMORY:], "recent": recent[-_RECENT:], "point": point + 1,
               "pending": None, "starved": False}
        if a.action in ("hold", "correct"):
            # The condition held again: a stretch the budget left unheld ends here.
            new["unheld"] = Unheld.from_dict(state.get("unheld")).end(clock_now).to_dict()
        target = {**held, "detuning": a.target_detuning_hz}
        if a.action == "alarm":
            counts["alarms"] += 1
            new.update(recovery_after_alarm(a, point=point, plan=plan, recent=recent, lock=lock,
                                            held=held, limits=(limit.min, limit.max),
                                            clock_s=clock_now, prior=state["prior"],
                                            first_index=int(state["stages"])))
        else:
            if a.action in ("correct", "recheck") and not holds_setpoints(target, held):
                counts["corrections"] += 1
                new["pending"] = {"kind": "correct", "point": point, "from": held, "to": target,
                                  "reason": a.reason}
                new["held"] = target
            after = next_check(plan, action=a.action, clock_s=clock_now,
                               first_shot_s=m.t_first,
                               # An unreadable check is always repeated at once.
                               run=int(state["next"].get("run", 0)) if a.usable else 0,
                               statistic=max(a.upper, a.lower) if a.usable else 0.0)
            if after["recheck"]:
                counts["rechecks"] += 1
            new["next"] = {"point": point + 1, "shots_per_phase": plan.shots_per_phase,
                           **after}
        self.state = new
        self._snapshot("hold", point=point, action=a.action, reason=a.reason,
                       setpoints=held, clock_s=m.clock_s, numbers=a.numbers())
        self._tell("check", estimate=estimate, action=a.action)

    def _tell(self, event: str, *, estimate: InversionEstimate | None = None, action: str = "",
              next_in_s: float | None = None) -> None:
        """Tell the session's progress observer where the night stands (display only)."""
        observer = self.session.progress
        if observer is None or self.state is None:
            return
        counts = self.state.get("counts") or {}
        night = self.session.clock - self.start_clock
        if estimate is None and self.ledger.last_estimate is not None and \
                self.ledger.last_estimate.get("label") == HOLD:
            estimate = InversionEstimate.from_dict(self.ledger.last_estimate["estimate"])
        item = NightProgress(
            event=event,  # type: ignore[arg-type]
            night_s=night, end_s=self.config.track.max_rig_time_s or None,
            setpoints={k: float(v) for k, v in (self.state.get("held") or {}).items()},
            checks=int(counts.get("checks", 0)), corrections=int(counts.get("corrections", 0)),
            alarms=int(counts.get("alarms", 0)), retunes=int(counts.get("retunes", 0)),
            calibrations=int(counts.get("calibrations", 0)),
            holding_share=self.ledger.holding_beam_s / night if night > 0 else None,
            budget_fraction=self.settings.budget_fraction,
            inversion=None if estimate is None else estimate.inversion,
            interval=None if estimate is None else (estimate.inversion_low,
                                                    estimate.inversion_high),
            action=action, next_in_s=next_in_s)
        try:
            observer(item)
        except Exception as exc:  # a display must never stop a night
            self.log.warning("progress_observer_dropped", error=f"{type(exc).__name__}: {exc}")
            self.session.progress = None

    # -- the end -------------------------------------------------------------------------------------

    def _finish(self, reason: str, status: str) -> dict[str, Any]:
        session = self.session
        on_stop = self.config.track.on_stop
        held = self.state.get("held") if self.state else None
        if self._find("decision", what="stop", status=status) is None:
            session.decide("stop", reason, status=status, on_stop=on_stop)
        if on_stop == "last_good" and held:
            try:
                session.ensure_at(held, reason="the night ended: leave the rig at the held "
                                               "set-points")
                where = "the held set-points"
            except RigError as exc:
                session.go_safe(f"the night ended; the move to the held set-points failed: {exc}")
                where = "its safe set-points (the move to the held set-points failed)"
        else:
            session.go_safe(f"the night ended: {reason}", expected=status == "ended")
            where = "its safe set-points"
        return self._result(status, reason, where)

    def leave_on_signal(self) -> tuple[bool | None, str]:
        """Where a stop signal leaves the rig: (safe confirmed?, detail), as Interrupted carries."""
        held = self.state.get("held") if self.state else None
        if self.config.track.on_stop == "last_good" and held and \
                self.state.get("mode") == "hold" and holds_setpoints(self.session.current, held):
            self.session.decide("stop", "stopped by signal: the rig stays at the held set-points "
                                "(track.on_stop = last_good)", status="interrupted",
                                on_stop="last_good")
            return None, ""
        return self.session.go_safe("stopped by signal")

    def _result(self, status: str, reason: str, where: str) -> dict[str, Any]:
        state = self.state or {}
        counts = dict(state.get("counts") or {})
        night = self.session.clock - self.start_clock
        last = self.ledger.last_estimate
        result: dict[str, Any] = {
            "command": "track", "status": status, "accepted": status == "ended",
            "stop_reason": reason, "left_at": where,
            "setpoints": dict(state.get("held") or self.session.current),
            "held": bool(state.get("held")), **counts,
            "shots": self.ledger.shots,
            "rig_time_s": self.ledger.check_beam_s + self.ledger.stage_beam_s_total,
            "night_rig_time_s": night, "holding_beam_s": self.ledger.holding_beam_s,
            "holding_share": self.ledger.holding_beam_s / night if night > 0 else None,
            "budget_fraction": self.settings.budget_fraction,
            "budget_ceiling_s": self._budget().ceiling_s,
            # Rig time the night could not hold because of the budget (hold.Unheld).
            "budget_unheld_s": Unheld.from_dict(state.get("unheld")).at(self.session.clock),
            "budget_limited": len(decisions(parse_all(self.ledger.records), "budget",
                                            "unwatched")),
            "plan": state.get("plan"), "lock": state.get("lock"),
            # Before the first check: the time to confirm a thermal step, and what would bring
            # it within (hold_outlook.StepOutlook; None when the night never held).
            "step_outlook": self._outlook(),
            # The last outlook told, the same as the first unless a later plan's time to
            # confirm crossed hold_outlook.CONFIRM_WITHIN_S (hold_outlook.outlook_due).
            "last_step_outlook": self._outlook(latest=True),
            "run_dir": str(self.prepared.run_dir),
        }
        if last is not None:
            e = InversionEstimate.from_dict(last["estimate"])
            result.update({"inversion": e.inversion,
                           "inversion_interval": [e.inversion_low, e.inversion_high],
                           "inversion_stderr": e.inversion_stderr, "confidence": e.confidence,
                           "phase_shift_rad": e.phase_shift,
                           "phase_shift_stderr_rad": e.phase_shift_stderr,
                           "absorption": e.absorption, "last_measurement": {
                               "label": last.get("label"), "point": last.get("point")}})
        return json_ready(result)
