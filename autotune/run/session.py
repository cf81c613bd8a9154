"""One stage's conversation with the rig (:class:`Session`): guarded moves, bounded retries
under one ``msg_id`` (:func:`call_with_recovery`), acquisitions written ahead and journaled,
the measurement's bookkeeping (:class:`Measurement`, :class:`Tally`) and what the progress
observer is told.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import structlog

from autotune.config import RunConfig
from autotune.errors import (
    Interrupted,
    JournalError,
    LimitError,
    ProtocolError,
    RigError,
    RigMismatch,
    RigRefused,
    RigRestarted,
    RigTimeout,
)
from autotune.analysis.fringe import FringeData, InversionEstimate, estimate_inversion
from autotune.run.journal import Journal
from autotune.run.records import Move, MoveUnconfirmed, Request, Safe, SafeFailed, parse_all
from autotune.wire.protocol import new_msg_id
from autotune.wire.rig import FIELDS, Rig, measurement_shots
from autotune.progress import SEARCH_DONE_LABELS, ProgressObserver, StageProgress
from autotune.run.guard import Budget, effective_limits, holds_setpoints, plan_moves, setpoint_in_force

__all__ = ["Tally", "Measurement", "NOT_SEARCH_STEPS", "ramsey_phases", "call_with_recovery",
           "Session"]

_log = structlog.get_logger(__name__)


def ramsey_phases(count: int) -> tuple[float, ...]:
    """``count`` Ramsey phases equally spaced on [0, 2 pi) (rad)."""
    return tuple(2.0 * math.pi * j / count for j in range(count))


@dataclass
class Tally:
    shots: int = 0
    rig_time_s: float = 0.0


@dataclass
class Measurement:
    """Acquisitions of one measurement, keyed by (field, phase index)."""

    label: str
    point: int
    setpoints: dict[str, float]
    shots_per_phase: int
    counts: dict[tuple[str, int], tuple[int, int, int]] = field(default_factory=dict)
    t_first: float | None = None
    t_last: float | None = None
    # Requests written ahead in the journal whose reply never arrived: (field, phase index)
    # -> (msg_id, shots). A resume resends them with the same msg_id first.
    pending: dict[tuple[str, int], tuple[str, int]] = field(default_factory=dict)

    def note_times(self, t_start: float, t_end: float) -> None:
        """Widen the measurement's span on the rig clock to include one acquisition."""
        self.t_first = t_start if self.t_first is None else min(self.t_first, t_start)
        self.t_last = t_end if self.t_last is None else max(self.t_last, t_end)

    @property
    def clock_s(self) -> float | None:
        """Mid-time of the measurement on the rig clock (s); the drift model dates it so."""
        if self.t_first is None or self.t_last is None:
            return None
        return 0.5 * (self.t_first + self.t_last)

    @property
    def started(self) -> bool:
        """True once an acquisition was sent or received (its shots per phase are fixed)."""
        return bool(self.counts or self.pending)


#: Measurement labels that do not count against the point budget of a search.
NOT_SEARCH_STEPS = ("check", "verify", "correct", "refine")


@dataclass
class _ProgressPlan:
    """What the progress observer is told about the stage: budgets and what was measured."""

    stage: str
    budget: Budget
    step_shots: int
    verify_shots: int
    refine_points: int = 0
    steps: int = 0
    refines: int = 0
    best: tuple[InversionEstimate, dict[str, float]] | None = None
    #: Shots of a verification's second half that may follow the half being measured.
    verify_rest: int = 0

    def note(self, estimate: InversionEstimate, setpoints: Mapping[str, float]) -> None:
        """Keep the highest inversion measured so far."""
        if self.best is None or estimate.inversion > self.best[0].inversion:
            self.best = (estimate, {k: float(v) for k, v in setpoints.items()})


def _log_decision(what: str, reason: str, *, level: str = "info", **fields: Any) -> None:
    """A decision taken before the run's journal exists: logged only."""
    getattr(_log, level)("decision", what=what, reason=reason, **fields)


def call_with_recovery(what: str, action: Callable[[str], Any], recovery: Any, *, rig: Rig,
                       stop: threading.Event | None = None,
                       sleep: Callable[[float], None] | None = None,
                       decide: Callable[..., None] | None = None,
                       msg_id: str | None = None) -> Any:
    """Run one logical rig operation with bounded retries, under one ``msg_id``.

    The one recovery path of every rig call of a run, its opening ``describe`` and ``status``
    included. ``action(msg_id)`` performs the call (the bus client makes its own
    ``1 + [bus] retries`` attempts inside it). A timeout, a malformed reply, a ``busy`` or
    ``internal`` refusal is retried (at most ``recovery.step_retries`` times,
    ``recovery.retry_wait_s`` apart); an interlock waits (bounded) and retries. Every retry
    resends the same ``msg_id``: a rig that already executed the request answers from its replay
    cache instead of running it again, and one that answered ``internal`` (it failed, the
    request did not complete) runs it again (see :mod:`autotune.wire.protocol`).

    Parameters
    ----------
    what : str
        The operation's name, for the decisions and the log.
    action : callable
        ``action(msg_id)`` makes the call and returns its reply.
    recovery : RecoveryConfig
        ``step_retries``, ``retry_wait_s``, ``interlock_poll_s``, ``interlock_max_wait_s``.
    rig : Rig
        Asked for its ``status`` while an interlock is set.
    stop : threading.Event, optional
        A stop signal: checked before every attempt (:class:`Interrupted`).
    sleep : callable, optional
        The wait between attempts (s); by default one that ends early at ``stop``.
    decide : callable, optional
        ``decide(what, reason, **fields)`` records a retry or the give-up (the session's
        journal); by default they are only logged (before a run's journal exists).
    msg_id : str, optional
        The operation's ``msg_id`` (default: a new one).
    """
    decide = decide if decide is not None else _log_decision
    if sleep is None:
        sleep = stop.wait if stop is not None else time.sleep
    msg_id = msg_id if msg_id is not None else new_msg_id()
    failures = 0
    while True:
        if stop is not None and stop.is_set():
            raise Interrupted("stopped by signal")
        try:
            return action(msg_id)
        except Interrupted:
            # A stop abandoned the call in flight: name its msg_id for the resume (an
            # acquisition's or a move's request record holds it too).
            decide("abandon", f"{what} abandoned at a stop signal; msg_id {msg_id} may or may "
                              f"not have run", op=what, msg_id=msg_id)
            raise
        except RigRefused as exc:
            if exc.kind == "interlock":
                _wait_interlock(what, exc.detail, recovery, rig=rig, stop=stop, sleep=sleep,
                                decide=decide)
                continue
            if exc.kind not in ("busy", "internal"):
                raise
            error: RigError = exc
        except (RigTimeout, ProtocolError) as exc:
            # No valid reply: the request may or may not have run; the same msg_id is safe.
            error = exc
        failures += 1
        if failures > recovery.step_retries:
            decide("give_up", f"{what} failed {failures} times: {error}", op=what, msg_id=msg_id)
            raise error
        decide("retry", f"{what} failed: {error}; resending msg_id {msg_id}", op=what,
               attempt=failures, msg_id=msg_id)
        sleep(recovery.retry_wait_s)


def _wait_interlock(what: str, detail: str, recovery: Any, *, rig: Rig,
                    stop: threading.Event | None, sleep: Callable[[float], None],
                    decide: Callable[..., None]) -> None:
    decide("pause", f"interlock during {what}: {detail}", op=what)
    waited = 0.0
    while waited < recovery.interlock_max_wait_s:
        if stop is not None and stop.is_set():
            raise Interrupted("stopped by signal")
        sleep(recovery.interlock_poll_s)
        waited += recovery.interlock_poll_s
        status = rig.status()
        if status.interlock is None:
            decide("resume", f"interlock cleared after {waited:g} s", op=what)
            return
    raise RigRefused("interlock", f"{detail} (still set after {waited:g} s)")


class Session:
    """One stage's conversation with the rig: guarded moves, bounded retries, journaled steps.

    Every logical rig operation keeps one ``msg_id`` through all of its retries (the bus
    client's resends and this loop's own retries after a timeout, a ``busy`` or ``internal``
    refusal or an interlock), so a rig that keeps its replies never executes it twice. An
    acquisition is written ahead to the journal (a ``request`` record with its ``msg_id``)
    before it is sent, so a resume can ask for its reply again instead of acquiring anew.

    Parameters
    ----------
    rig : Rig
        The apparatus (a :class:`autotune.wire.bus.BusClient` in every real run).
    config : RunConfig
        The checked configuration.
    journal : Journal
        Where every step is recorded before the next one starts.
    description : Description
        The rig's describe reply (limits, repetition rate).
    stop : threading.Event
        Set by the CLI's signal handler; checked between acquisitions.
    sleep : callable, optional
        Wall-clock wait used between retries (injectable for tests); by default a wait that
        ends early at a stop signal.
    progress : callable, optional
        A progress observer (:mod:`autotune.progress`), told a
        :class:`~autotune.progress.StageProgress` at the stage's start, after every
        acquisition and after every estimate; never journaled.
    """

    def __init__(self, rig: Rig, config: RunConfig, journal: Journal, description: Any,
                 stop: threading.Event | None = None,
                 sleep: Callable[[float], None] | None = None,
                 progress: ProgressObserver | None = None) -> None:
        self.rig = rig
        self.config = config
        self.journal = journal
        self.description = description
        self.limits = effective_limits(config, description)
        self.repetition_rate_hz = float(description.repetition_rate_hz)
        self.stop = stop if stop is not None else threading.Event()
        # By default a wait between retries ends at a stop signal (the next look raises).
        self.sleep = sleep if sleep is not None else self.stop.wait
        self.tally = Tally()
        self.phases = ramsey_phases(config.measurement.ramsey_phases)
        self.current: dict[str, float] = {}
        self.clock = 0.0
        self.log = _log.bind(run=journal.run_dir.name)
        self.progress = progress
        self._plan: _ProgressPlan | None = None
        # Moves written ahead whose outcome is not known yet: msg_id -> the step's set-points;
        # and safe requests (the rig's own procedure) likewise, by msg_id.
        self._unresolved_moves: dict[str, dict[str, float]] = {}
        self._unresolved_safe: set[str] = set()

    # -- recording -----------------------------------------------------------------------

    def decide(self, what: str, reason: str, *, level: str = "info", **fields: Any) -> None:
        """Record a decision and its reason in the journal and the log (at ``level``)."""
        self.journal.append("decision", what=what, reason=reason, **fields)
        getattr(self.log, level)("decision", what=what, reason=reason, **fields)

    # -- progress (display only, never journaled) ----------------------------------------

    def plan_progress(self, stage: str, budget: Budget, *, step_shots: int, verify_shots: int,
                      refine_points: int = 0,
                      measured: Iterable[tuple[str, Mapping[str, float], InversionEstimate]] = ()
                      ) -> None:
        """Tell the progress observer what this stage is (and, on a resume, what it did).

        Parameters
        ----------
        stage : str
            ``"calibrate"`` or ``"retune"``.
        budget : Budget
            The search's budget.
        step_shots : int
            Shots of one search step (both fields, every phase), for the time to go.
        verify_shots : int
            Shots of the verification (both fields, every phase).
        refine_points : int
            Points of a final detuning scan after the search (0: none).
        measured : iterable of (label, set-points, estimate)
            Measurements already estimated (a resume): the steps done and the best so far.
        """
        self.log = self.log.bind(stage=stage)
        plan = _ProgressPlan(stage, budget, step_shots, verify_shots, refine_points)
        for label, setpoints, estimate in measured:
            plan.note(estimate, setpoints)
            if label == "refine":
                plan.refines += 1
            elif label not in NOT_SEARCH_STEPS:
                plan.steps += 1
        self._plan = plan
        self._tell_progress("start", None)

    def expect_verify_rest(self, shots: int) -> None:
        """A verification's second half of ``shots`` may follow the measurement about to be
        made (0: none will): the time to go counts it."""
        if self._plan is not None:
            self._plan.verify_rest = int(shots)

    def finish_progress(self) -> None:
        """The stage ended: tell the observer so (event ``end``, nothing more to go); no stage
        progress follows until the next :meth:`plan_progress` (the log keeps its stage)."""
        self._tell_progress("end", None)
        self._plan = None

    def end_progress(self) -> None:
        """The stage is over: measurements after it (a night's checks) tell no stage progress
        until the next :meth:`plan_progress`."""
        self._plan = None
        self.log = self.log.try_unbind("stage")

    def _tell_progress(self, event: str, m: Measurement | None) -> None:
        plan = self._plan
        if self.progress is None or plan is None:
            return
        per_measurement = measurement_shots(len(self.phases), 1)
        planned = per_measurement * m.shots_per_phase if m is not None else 0
        taken = min(len(m.counts) * m.shots_per_phase, planned) if m is not None else 0
        best = plan.best
        try:
            self.progress(StageProgress(
                stage=plan.stage, event=event, label=m.label if m is not None else "",  # type: ignore[arg-type]
                step=plan.steps, max_steps=plan.budget.max_points,
                shots=self.tally.shots, max_shots=plan.budget.max_shots,
                rig_time_s=self.tally.rig_time_s, max_rig_time_s=plan.budget.max_rig_time_s,
                measurement_shots=taken, measurement_shots_planned=planned,
                best_inversion=None if best is None else best[0].inversion,
                best_interval=None if best is None else (best[0].inversion_low,
                                                         best[0].inversion_high),
                best_setpoints={} if best is None else dict(best[1]),
                confidence=self.config.measurement.confidence,
                remaining_s=0.0 if event == "end"
                else self._remaining_shots(m, planned - taken) / self.repetition_rate_hz,
                repetition_rate_hz=self.repetition_rate_hz, clock_s=self.clock))
        except Exception as exc:  # noqa: BLE001 - a display must never stop a run
            self.log.warning("progress_observer_dropped", error=f"{type(exc).__name__}: {exc}")
            self.progress = None

    def _remaining_shots(self, m: Measurement | None, left_here: int) -> float:
        """Shots still to go at most: this measurement's rest, then the search budget's rest,
        a final detuning scan and one verification while the search goes on."""
        plan = self._plan
        assert plan is not None
        label = m.label if m is not None else ""
        if label in SEARCH_DONE_LABELS:
            return float(left_here + (plan.verify_rest if label == "verify" else 0))
        unfinished = 1 if m is not None and left_here > 0 else 0
        refine_left = plan.refine_points - plan.refines
        if label == "refine":
            search = 0.0
            refine_left -= unfinished
        else:
            steps_left = plan.budget.max_points - plan.steps
            if label not in NOT_SEARCH_STEPS:
                steps_left -= unfinished
            budget = plan.budget
            search = min(max(steps_left, 0) * plan.step_shots,
                         max(budget.max_shots - self.tally.shots - left_here, 0),
                         max(budget.max_rig_time_s - self.tally.rig_time_s, 0.0)
                         * self.repetition_rate_hz)
        return left_here + search + max(refine_left, 0) * plan.step_shots + plan.verify_shots

    # -- guarded rig calls ----------------------------------------------------------------

    def _check_stop(self) -> None:
        if self.stop.is_set():
            raise Interrupted("stopped by signal")

    def _call(self, what: str, action: Callable[[str], Any], msg_id: str | None = None) -> Any:
        """Run one logical rig operation through :func:`call_with_recovery` (this session's
        recovery settings, stop flag and journal)."""
        return call_with_recovery(what, action, self.config.recovery, rig=self.rig,
                                  stop=self.stop, sleep=self.sleep, decide=self.decide,
                                  msg_id=msg_id)

    def _wait_interlock(self, what: str, detail: str) -> None:
        _wait_interlock(what, detail, self.config.recovery, rig=self.rig, stop=self.stop,
                        sleep=self.sleep, decide=self.decide)

    def read_clock(self) -> float:
        """The rig's clock now (s), from its ``status`` through the recovery path; nothing
        else of the answer is taken up (see :meth:`learn_present`)."""
        return float(self._call("status", lambda _id: self.rig.status()).clock)

    def learn_present(self) -> dict[str, float]:
        """Ask the rig which set-points are in force (and settle, from its answer, the moves
        written ahead whose outcome is not known: see :meth:`resume_moves`)."""
        status = self._call("status", lambda _id: self.rig.status())
        self.current = {k: float(v) for k, v in status.setpoints.items()}
        self.clock = float(status.clock)
        self._reconcile_moves()
        return dict(self.current)

    def resume_moves(self, records: Iterable[Mapping[str, Any]]) -> None:
        """Take up, on a resume, the moves written ahead (``request`` records of op ``apply``)
        that have no outcome record (``move`` or ``move_unconfirmed`` with their ``msg_id``):
        the run stopped between the intent and its outcome, so the rig may or may not have
        made them. The next :meth:`learn_present` settles each from the rig's ``status``: a
        ``move`` record (``reconciled``) if the rig is at the step's set-points, else a
        ``move_unconfirmed`` record naming where it is. Journals written before moves were
        written ahead have no such requests and are read as they are.
        """
        intents: dict[str, dict[str, float]] = {}
        safes: set[str] = set()
        for rec in parse_all(records):
            if isinstance(rec, Request) and rec.op == "apply" and rec.msg_id and rec.setpoints:
                intents[rec.msg_id] = dict(rec.setpoints)
            elif isinstance(rec, Request) and rec.op == "safe" and rec.msg_id:
                safes.add(rec.msg_id)
            elif isinstance(rec, (Move, MoveUnconfirmed)) and rec.msg_id in intents:
                del intents[rec.msg_id]
            elif isinstance(rec, (Safe, SafeFailed)) and rec.msg_id in safes:
                safes.discard(rec.msg_id)
        self._unresolved_moves.update(intents)
        self._unresolved_safe.update(safes)

    def _reconcile_moves(self) -> None:
        """Write the outcome of every unresolved move (and safe request) from the set-points
        now in force."""
        safe = {k: float(v) for k, v in
                (getattr(self.description, "safe_setpoints", None) or {}).items()}
        for msg_id in sorted(self._unresolved_safe):
            self._unresolved_safe.discard(msg_id)
            if safe and all(setpoint_in_force(self.current.get(n), v) for n, v in safe.items()):
                self.journal.append("safe", setpoints=dict(self.current), msg_id=msg_id,
                                    reconciled=True,
                                    reason="its reply was never received; the rig's status "
                                           "shows its safe set-points in force")
            else:
                self.journal.append("safe_failed", msg_id=msg_id, reconciled=True,
                                    error=f"its reply was never received and the rig's status "
                                          f"shows {dict(self.current)}, not its safe set-points",
                                    reason="a resume asked the rig where it is")
        for msg_id, step in list(self._unresolved_moves.items()):
            del self._unresolved_moves[msg_id]
            at_step = all(setpoint_in_force(self.current.get(name), value)
                          for name, value in step.items())
            if at_step:
                self.journal.append("move", setpoints=step, applied=dict(self.current),
                                    clock=self.clock, msg_id=msg_id, reconciled=True,
                                    reason="its reply was never received; the rig's status "
                                           "shows the step's set-points in force")
            else:
                self.journal.append("move_unconfirmed", setpoints=step, msg_id=msg_id,
                                    in_force=dict(self.current), clock=self.clock,
                                    reason="its reply was never received and the rig's status "
                                           "does not show the step's set-points in force (it "
                                           "did not make it, or moved on since)")
            self.log.info("move_reconciled", msg_id=msg_id, setpoints=step, applied=at_step)

    def recover(self, error: RigMismatch, failures: int, what: str) -> None:
        """Handle a reply that contradicts what was applied: journal it, re-learn the rig.

        A restarted rig is described again (same name, its new limits); the set-points in
        force are asked afresh, so that the next move starts from the truth. Gives up (raises
        ``error``) after ``recovery.step_retries`` mismatches within one operation.
        """
        restarted = isinstance(error, RigRestarted)
        kind = "rig_restarted" if restarted else "rig_mismatch"
        if failures > self.config.recovery.step_retries:
            self.decide("give_up", f"{what}: {failures} mismatched replies, last: {error}", op=what)
            raise error
        self.decide(kind, f"{what}: {error}; nothing of this reply is filed as data, the "
                          f"set-points are applied again and the acquisition repeated",
                    op=what, attempt=failures)
        if restarted:
            description = self._call("describe", lambda _id: self.rig.describe())
            if description.rig != self.description.rig:
                raise RigError(f"another rig answers at this endpoint: {description.rig!r}, "
                               f"this run is on {self.description.rig!r}")
            self.description = description
            self.limits = effective_limits(self.config, description)
            self.repetition_rate_hz = float(description.repetition_rate_hz)
            self.journal.append("rig", instance=description.instance,
                                reason="the rig restarted; described again")
        self.learn_present()

    def move_to(self, target: Mapping[str, float], reason: str) -> None:
        """Move to ``target`` in guarded steps, journaling each applied step."""
        failures = 0
        while True:
            try:
                self._move_once(target, reason)
                return
            except RigMismatch as exc:
                failures += 1
                self.recover(exc, failures, "apply")

    def ensure_at(self, target: Mapping[str, float], reason: str) -> None:
        """Move to ``target`` (:meth:`move_to`, ``reason`` journaled) unless every one of its
        set-points is known to be in force already (:func:`~autotune.run.guard.holds_setpoints`,
        to float rounding). A set-point this session does not know (none learned yet, or
        forgotten after a failed move or a mismatch) is not in force: the move is made."""
        if not holds_setpoints(self.current, target):
            self.move_to(target, reason=reason)

    def _move_once(self, target: Mapping[str, float], reason: str) -> None:
        if not self.current:
            self.learn_present()
        steps = plan_moves(self.current, target, self.limits)
        if len(steps) > 1:
            self.decide("split_move", f"{reason}: move needs {len(steps)} steps within max_step",
                        target=dict(target), level="debug")
        for step in steps:
            self._check_stop()
            for name, value in step.items():
                self.limits[name].check(name, value)
            msg_id = new_msg_id()
            # Write-ahead, as for an acquisition: the journal names every move the rig may
            # have made, even if this process dies before the reply is recorded.
            self.journal.append("request", op="apply", msg_id=msg_id, setpoints=step,
                                reason=reason)
            self._unresolved_moves[msg_id] = dict(step)
            try:
                applied = self._call("apply", lambda i, s=step: self.rig.apply(s, msg_id=i),
                                     msg_id)
            except (LimitError, RigRefused) as exc:
                # Refused before it left, or by the rig (after the retries): nothing moved,
                # unless the rig failed while moving (internal): then its status decides.
                if not (isinstance(exc, RigRefused) and exc.kind == "internal"):
                    del self._unresolved_moves[msg_id]
                    self.journal.append("move_unconfirmed", setpoints=step, msg_id=msg_id,
                                        refused=getattr(exc, "kind", "limit"), reason=str(exc))
                self.current = {}
                raise
            except (RigError, Interrupted):
                # The rig may or may not have moved: the next status (here or at the resume)
                # settles it, before the next step is planned.
                self.current = {}
                raise
            del self._unresolved_moves[msg_id]
            self.current = {k: float(v) for k, v in applied.setpoints.items()}
            self.clock = float(applied.clock)
            self.journal.append("move", setpoints=step, applied=self.current, clock=applied.clock,
                                reason=reason, msg_id=msg_id)
            self.log.debug("move", setpoints=step, reason=reason)

    def go_safe(self, reason: str, *, expected: bool = False) -> tuple[bool, str]:
        """Send the rig to its safe set-points; record it. Never raises past a rig error.
        ``expected``: the planned end of a run (logged as information, not as a warning).

        Returns
        -------
        (bool, str)
            Whether the rig confirmed its safe set-points, and its error if it did not.
        """
        msg_id = new_msg_id()
        try:
            # Written ahead like every move; a run folder that cannot be written must not
            # keep the rig from its safe set-points.
            self.journal.append("request", op="safe", msg_id=msg_id, reason=reason)
            self._unresolved_safe.add(msg_id)
        except JournalError as exc:
            self.log.error("safe_request_not_journaled", error=str(exc))
        try:
            reply = self.rig.safe(msg_id=msg_id)
            self.current = {k: float(v) for k, v in reply.setpoints.items()}
            self._unresolved_safe.discard(msg_id)
            self.journal.append("safe", setpoints=self.current, reason=reason, msg_id=msg_id)
            (self.log.info if expected else self.log.warning)(
                "safe_setpoints_applied", reason=reason, setpoints=self.current)
            return True, ""
        except (RigError, Interrupted) as exc:
            self._unresolved_safe.discard(msg_id)
            self.journal.append("safe_failed", reason=reason, error=str(exc), msg_id=msg_id)
            self.log.error("safe_setpoints_failed", reason=reason, error=str(exc))
            return False, str(exc)

    # -- measurements ---------------------------------------------------------------------

    def measure(self, m: Measurement, seed: int) -> InversionEstimate:
        """Complete measurement ``m`` (only its missing acquisitions) and estimate it."""
        cfg = self.config.measurement
        for j, phase in enumerate(self.phases):
            for field_state in FIELDS:
                failures = 0
                while (field_state, j) not in m.counts:
                    self._check_stop()
                    try:
                        self._acquire_one(m, field_state, j, phase)
                    except RigMismatch as exc:
                        failures += 1
                        self.recover(exc, failures, "acquire")
        estimate = estimate_inversion(
            self.fringe(m, "empty"), self.fringe(m, "one_photon"),
            confidence=cfg.confidence, seed=seed, resamples=cfg.resamples,
        )
        self.journal.append("estimate", label=m.label, point=m.point, setpoints=m.setpoints,
                            clock_s=m.clock_s, estimate=estimate.to_dict())
        self.log.info("estimate", label=m.label, point=m.point, setpoints=m.setpoints,
                      inversion=estimate.inversion, inversion_low=estimate.inversion_low,
                      inversion_high=estimate.inversion_high,
                      phase_shift_rad=estimate.phase_shift, absorption=estimate.absorption)
        if self._plan is not None:
            self._plan.note(estimate, m.setpoints)
            if m.label == "refine":
                self._plan.refines += 1
            elif m.label not in NOT_SEARCH_STEPS:
                self._plan.steps += 1
        self._tell_progress("estimate", m)
        return estimate

    def _acquire_one(self, m: Measurement, field_state: str, j: int, phase: float) -> None:
        """Take (or recover) one acquisition of ``m`` and journal it; never files a mismatch."""
        self.ensure_at(m.setpoints, reason=f"{m.label} {m.point}")
        resend = (field_state, j) in m.pending
        if resend:
            msg_id, shots = m.pending[(field_state, j)]
        else:
            msg_id, shots = new_msg_id(), m.shots_per_phase
            # Write-ahead: the request is on disk before it leaves, so a kill between the rig's
            # execution and our record leaves a msg_id that a resume can ask for again.
            self.journal.append("request", op="acquire", msg_id=msg_id, label=m.label,
                                point=m.point, field=field_state, phase_index=j,
                                ramsey_phase=phase, shots=shots)
            m.pending[(field_state, j)] = (msg_id, shots)
        try:
            acq = self._call("acquire", lambda i: self.rig.acquire(
                field_state, phase, shots, msg_id=i, resend=resend), msg_id)
        except RigMismatch as exc:
            del m.pending[(field_state, j)]
            reply = exc.reply
            self.journal.append(
                "discarded", msg_id=msg_id, label=m.label, point=m.point, field=field_state,
                phase_index=j, shots=int(reply.shots) if reply is not None else None,
                counts=({"e": int(reply.counts.e), "g": int(reply.counts.g),
                         "i": int(reply.counts.i)} if reply is not None else None),
                setpoints=(dict(reply.setpoints) if reply is not None else None),
                reason=str(exc))
            self.current = {}
            raise
        except RigRefused as exc:
            # The rig answered and did not acquire: nothing is pending any more, and a resume
            # (perhaps with corrected shots) starts this acquisition afresh.
            del m.pending[(field_state, j)]
            self.journal.append("refused", op="acquire", msg_id=msg_id, label=m.label,
                                point=m.point, field=field_state, phase_index=j, kind=exc.kind,
                                detail=exc.detail)
            raise
        del m.pending[(field_state, j)]
        counts = (int(acq.counts.e), int(acq.counts.g), int(acq.counts.i))
        m.counts[(field_state, j)] = counts
        m.note_times(float(acq.t_start), float(acq.t_end))
        self.clock = max(self.clock, float(acq.t_end))
        self.tally.shots += int(acq.shots)
        self.tally.rig_time_s += float(acq.t_end) - float(acq.t_start)
        self.journal.append(
            "acquisition", label=m.label, point=m.point, field=field_state, phase_index=j,
            ramsey_phase=phase, shots=int(acq.shots),
            counts={"e": counts[0], "g": counts[1], "i": counts[2]},
            t_start=float(acq.t_start), t_end=float(acq.t_end),
            setpoints={k: float(v) for k, v in acq.setpoints.items()}, msg_id=msg_id,
        )
        self.log.debug("acquisition", label=m.label, point=m.point, field=field_state,
                       phase_index=j, shots=int(acq.shots),
                       counts={"e": counts[0], "g": counts[1], "i": counts[2]})
        self._tell_progress("acquisition", m)

    def fringe(self, m: Measurement, field_state: str) -> FringeData:
        """The counts of one field state of ``m`` as fringe data."""
        rows = [(self.phases[j], *m.counts[(field_state, j)]) for j in range(len(self.phases))]
        arr = np.asarray(rows, dtype=float)
        return FringeData.from_counts(arr[:, 0], arr[:, 1].astype(np.int64),
                                      arr[:, 2].astype(np.int64), arr[:, 3].astype(np.int64))
