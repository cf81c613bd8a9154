"""The closed loop: propose -> guard -> apply -> acquire -> estimate -> tell -> record.

A run is a sequence of *measurements*. Each measurement is one point of set-points, measured as
a fringe of both field states: at each of K Ramsey phases ``2 pi j / K`` the loop acquires the
empty field, then the one-photon field (interleaved, so that a slow drift biases both alike).
Every acquisition is written to the journal as soon as its counts arrive, so a run killed at any
moment loses no shots: :func:`run_stage` given the journal's records re-tells the finished
points to the strategy, completes the unfinished measurement from its missing acquisitions
only, and goes on.

Measurement labels (``label`` in the journal): ``"point"`` for a search point (numbered by
``point``), ``"check"`` for the retune's first measurement at the last good set-points,
``"verify"`` for the final verification at the recommended set-points.

Safety: no set-point reaches the rig unless it lies within the effective limits (the tighter of
the configured limits and those the rig described); a long move is split into steps no larger
than the largest allowed step; on an unrecoverable fault or a stop signal the rig is sent to its
safe set-points before the error propagates.
"""

from __future__ import annotations

import dataclasses
import math
import sys
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import structlog
from scipy import stats

from autotune.config import RunConfig
from autotune.errors import (
    ConfigError,
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
from autotune.wire.protocol import STEP_TOLERANCE, new_msg_id
from autotune.wire.rig import FIELDS, Rig, measurement_shots
from autotune.analysis.guided import LockPrior, LockSettings, PhaseLockSearch, Shortfall
from autotune.progress import SEARCH_DONE_LABELS, ProgressObserver, StageProgress, count_text
from autotune.analysis.search import Dimension, PointResult, SearchSpace, Strategy
from autotune.analysis.shortfall import finite_or_none
from autotune.analysis.strategies import make_strategy

__all__ = [
    "Measurement",
    "replay_records",
    "Limit",
    "Budget",
    "StageOutcome",
    "effective_limits",
    "plan_moves",
    "ramsey_phases",
    "child_seed",
    "search_space",
    "build_strategy",
    "Session",
    "run_stage",
    "run_guided_stage",
    "lock_settings",
    "GUIDED_LABELS",
    "retune_box",
    "quadratic_peak",
    "call_with_recovery",
    "shortfall_numbers",
    "acceptance_reason",
]

_log = structlog.get_logger(__name__)



@dataclass(frozen=True)
class Limit:
    """Effective limits of one set-point, in its unit."""

    min: float
    max: float
    max_step: float

    def check(self, name: str, value: float) -> None:
        """Raise :class:`LimitError` unless ``value`` is finite and within [min, max]."""
        if not math.isfinite(value):
            raise LimitError(f"set-point {name}: value {value!r} is not finite")
        if value < self.min or value > self.max:
            raise LimitError(
                f"set-point {name}: {value:g} is outside its limits [{self.min:g}, {self.max:g}]"
            )


@dataclass(frozen=True)
class Budget:
    """When a search must stop, whatever the strategy says."""

    max_points: int
    max_shots: int
    max_rig_time_s: float
    min_points: int


@dataclass(frozen=True)
class StageOutcome:
    """What one stage (a calibration or a retune) ended with."""

    status: str
    setpoints: dict[str, float]
    estimate: InversionEstimate
    stop_reason: str
    points: int
    shots: int
    rig_time_s: float
    accepted: bool
    check: InversionEstimate | None = None
    drift_rate_hz_per_s: float = 0.0
    lock_prior: dict[str, Any] | None = None
    predicted_shortfall: dict[str, Any] | None = None
    reason: str = ""


def effective_limits(config: RunConfig, description: Any) -> dict[str, Limit]:
    """The tighter of the configured and the described limits of every searched set-point.

    Raises
    ------
    ConfigError
        A configured set-point is unknown to the rig, its unit differs from the rig's, or its
        search box reaches outside the rig's limits.
    """
    limits: dict[str, Limit] = {}
    for sp in config.setpoints:
        described = description.setpoints.get(sp.name)
        key = f"setpoints.{sp.name}"
        if described is None:
            raise ConfigError(config.source, key, "a set-point the rig describes ("
                              + ", ".join(sorted(description.setpoints)) + ")", sp.name)
        if described.unit != sp.unit:
            raise ConfigError(config.source, f"{key}.unit", f"the rig's unit {described.unit!r}",
                              sp.unit)
        limit = Limit(
            min=max(sp.limit_min, described.min),
            max=min(sp.limit_max, described.max),
            max_step=min(sp.max_step, described.max_step),
        )
        if sp.search_min < limit.min or sp.search_max > limit.max:
            raise ConfigError(config.source, f"{key}.search_min/search_max",
                              f"a box within the effective limits [{limit.min:g}, {limit.max:g}]",
                              [sp.search_min, sp.search_max])
        limits[sp.name] = limit
    return limits


def plan_moves(current: Mapping[str, float], target: Mapping[str, float],
               limits: Mapping[str, Limit]) -> list[dict[str, float]]:
    """Split the move from ``current`` to ``target`` into steps within the largest step.

    All set-points move together along a straight line, in the fewest equal steps that keep
    every set-point's change within its ``max_step``; the last step lands exactly on
    ``target``. Only set-points named in ``target`` move.

    Raises
    ------
    LimitError
        ``target`` names an unknown set-point or a value outside its limits. Nothing is planned.
    """
    for name, value in target.items():
        if name not in limits:
            raise LimitError(f"set-point {name}: not among the limited set-points "
                             + ", ".join(sorted(limits)))
        limits[name].check(name, float(value))
    n_steps = 1
    for name, value in target.items():
        start = current.get(name)
        if start is None:
            raise LimitError(f"set-point {name}: its present value is unknown, cannot bound the step")
        distance = abs(float(value) - float(start))
        max_step = limits[name].max_step
        needed = math.ceil(distance / max_step * (1.0 - STEP_TOLERANCE))
        if needed > 1:
            # Intermediate steps are interpolated, so each carries the rounding of two floats
            # of the size of the set-point: plan them that much below max_step, so that the
            # rig's and the client's step checks never see a step above it.
            room = max_step - 4.0 * sys.float_info.epsilon * max(abs(float(value)),
                                                                abs(float(start)))
            if room <= 0.0:
                raise LimitError(f"set-point {name}: max_step {max_step!r} is below the float "
                                 f"resolution at {float(value)!r}; cannot plan the move")
            needed = max(needed, math.ceil(distance / room))
        n_steps = max(n_steps, needed)
    steps: list[dict[str, float]] = []
    for k in range(1, n_steps + 1):
        if k == n_steps:
            steps.append({name: float(value) for name, value in target.items()})
        else:
            steps.append({
                name: float(current[name]) + (float(value) - float(current[name])) * k / n_steps
                for name, value in target.items()
            })
    for name in target:
        # A rig found outside the limits (left there by hand, or a read-back in another unit
        # than its channel's) cannot be walked in: the first steps would be outside too. Say
        # where the rig is, not only which planned value is refused.
        start = float(current[name])
        limit = limits[name]
        if not limit.min <= start <= limit.max and not limit.min <= steps[0][name] <= limit.max:
            raise LimitError(
                f"set-point {name}: the rig is at {start:g}, outside its limits "
                f"[{limit.min:g}, {limit.max:g}], and the move to {float(target[name]):g} in "
                f"steps of at most {limit.max_step:g} would send {steps[0][name]:g} first; "
                f"no set-point was sent: bring the rig within the limits (or check that its read-back "
                f"is in the channel's unit)")
    return steps


def quadratic_peak(x: Sequence[float], y: Sequence[float], stderr: Sequence[float]) -> float:
    """The ``x`` of the peak of a weighted quadratic fit of ``y(x)``, within the scanned range.

    Weights are ``1 / stderr**2``. If the fitted parabola does not open downwards, or its
    vertex lies outside ``[min(x), max(x)]``, the ``x`` of the best ``y`` is returned instead.
    """
    xs = np.asarray(x, dtype=float)
    ys = np.asarray(y, dtype=float)
    weights = 1.0 / np.maximum(np.asarray(stderr, dtype=float), 1e-12)
    best = float(xs[int(np.argmax(ys))])
    if len(np.unique(xs)) < 3:
        return best
    centre, scale = float(np.mean(xs)), float(np.ptp(xs)) or 1.0
    # np.polyfit weights multiply residuals, so they are 1/sigma (not 1/sigma^2).
    curvature, slope, _ = np.polyfit((xs - centre) / scale, ys, 2, w=weights)
    if curvature >= 0.0:
        return best
    vertex = centre - scale * slope / (2.0 * curvature)
    return float(vertex) if xs.min() <= vertex <= xs.max() else best


def ramsey_phases(count: int) -> tuple[float, ...]:
    """``count`` Ramsey phases equally spaced on [0, 2 pi) (rad)."""
    return tuple(2.0 * math.pi * j / count for j in range(count))


def child_seed(seed: int, *path: int) -> int:
    """A reproducible 32-bit child seed of ``seed`` for the sub-task named by ``path``."""
    return int(np.random.SeedSequence([seed, *path]).generate_state(1)[0])


def search_space(box: Mapping[str, tuple[float, float]]) -> SearchSpace:
    """The search space over ``{name: (low, high)}``, in the given order."""
    return SearchSpace(tuple(Dimension(name, lo, hi) for name, (lo, hi) in box.items()))


def retune_box(config: RunConfig, centre: Mapping[str, float],
               limits: Mapping[str, Limit]) -> dict[str, tuple[float, float]]:
    """The narrowed box of a retune: the last good set-points +- half widths, within the limits."""
    box = {}
    for sp in config.setpoints:
        half = config.retune.half_widths[sp.name]
        low = max(centre[sp.name] - half, limits[sp.name].min)
        high = min(centre[sp.name] + half, limits[sp.name].max)
        box[sp.name] = (low, high)
    return box


def build_strategy(kind: str, space: SearchSpace, config: RunConfig, *, seed: int,
                   n_initial_points: int, max_points: int,
                   initial_points: Sequence[Mapping[str, float]] = (),
                   warm_start: Sequence[tuple[Mapping[str, float], float, float, float]] = ()
                   ) -> Strategy:
    """The configured strategy over ``space``, with the settings of ``config.search``."""
    search = config.search
    if kind == "bayesian":
        drift = "detuning" if search.drift_compensation and "detuning" in space.names else None
        return make_strategy("bayesian", space, seed=seed, initial_points=initial_points,
                             n_initial_points=n_initial_points, warm_start=warm_start,
                             exploration=search.exploration, drift_dimension=drift,
                             max_drift_rate=search.max_drift_hz_per_s)
    if kind == "grid":
        return make_strategy("grid", space, seed=seed,
                             points_per_dimension=search.grid_points_per_dimension)
    if kind == "coordinate":
        start = dict(initial_points[0]) if initial_points else None
        return make_strategy("coordinate", space, seed=seed,
                             points_per_dimension=search.coordinate_points_per_dimension,
                             rounds=search.coordinate_rounds, start=start)
    if kind == "random":
        return make_strategy("random", space, seed=seed, n_points=max_points)
    raise ConfigError(config.source, "search.strategy", "bayesian, grid, coordinate or random", kind)


@dataclass
class _Tally:
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
_NOT_SEARCH_STEPS = ("check", "verify", "correct", "refine")


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


def _same_value(reported: float | None, wanted: float) -> bool:
    """A set-point in force equals the one sent (to float rounding)."""
    return reported is not None and abs(float(reported) - wanted) <= 1e-9 * max(1.0, abs(wanted))


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
        self.tally = _Tally()
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
            elif label not in _NOT_SEARCH_STEPS:
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
            if label not in _NOT_SEARCH_STEPS:
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
        for rec in records:
            kind = rec.get("type")
            if kind == "request" and rec.get("op") == "apply" and rec.get("msg_id"):
                intents[str(rec["msg_id"])] = {k: float(v) for k, v in rec["setpoints"].items()}
            elif kind == "request" and rec.get("op") == "safe" and rec.get("msg_id"):
                safes.add(str(rec["msg_id"]))
            elif kind in ("move", "move_unconfirmed") and rec.get("msg_id") in intents:
                del intents[str(rec["msg_id"])]
            elif kind in ("safe", "safe_failed") and rec.get("msg_id") in safes:
                safes.discard(str(rec["msg_id"]))
        self._unresolved_moves.update(intents)
        self._unresolved_safe.update(safes)

    def _reconcile_moves(self) -> None:
        """Write the outcome of every unresolved move (and safe request) from the set-points
        now in force."""
        safe = {k: float(v) for k, v in
                (getattr(self.description, "safe_setpoints", None) or {}).items()}
        for msg_id in sorted(self._unresolved_safe):
            self._unresolved_safe.discard(msg_id)
            if safe and all(_same_value(self.current.get(n), v) for n, v in safe.items()):
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
            at_step = all(_same_value(self.current.get(name), value)
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
            elif m.label not in _NOT_SEARCH_STEPS:
                self._plan.steps += 1
        self._tell_progress("estimate", m)
        return estimate

    def _acquire_one(self, m: Measurement, field_state: str, j: int, phase: float) -> None:
        """Take (or recover) one acquisition of ``m`` and journal it; never files a mismatch."""
        if any(abs(self.current.get(k, math.nan) - v) > 0.0 for k, v in m.setpoints.items()):
            self.move_to(m.setpoints, reason=f"{m.label} {m.point}")
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


@dataclass
class _Replayed:
    """What a stage's journal records say, rebuilt for a resume."""

    header: dict[str, Any] = field(default_factory=dict)
    measurements: dict[tuple[str, int], Measurement] = field(default_factory=dict)
    estimates: dict[tuple[str, int], dict[str, Any]] = field(default_factory=dict)
    estimate_order: list[tuple[str, int]] = field(default_factory=list)
    proposals: dict[int, dict[str, float]] = field(default_factory=dict)
    decisions: dict[str, dict[str, Any]] = field(default_factory=dict)


def replay_records(records: Iterable[Mapping[str, Any]]) -> _Replayed:
    """Rebuild measurements, estimates, proposals and decisions from journal records.

    Raises
    ------
    JournalError
        A record refers to a measurement the journal never opened, or an acquisition appears
        twice (both mean a damaged journal).
    """
    out = _Replayed()
    requests: dict[str, tuple[tuple[str, int], str, int, int]] = {}
    for rec in records:
        kind = rec.get("type")
        if kind == "stage":
            out.header = dict(rec)
        elif kind == "measurement":
            key = (rec["label"], int(rec["point"]))
            out.measurements[key] = Measurement(rec["label"], int(rec["point"]),
                                                 dict(rec["setpoints"]),
                                                 int(rec["shots_per_phase"]))
        elif kind == "amend":
            out.measurements[(rec["label"], int(rec["point"]))].shots_per_phase = \
                int(rec["shots_per_phase"])
        elif kind == "request" and rec.get("op") == "acquire":
            key = (rec["label"], int(rec["point"]))
            if key not in out.measurements:
                raise JournalError(f"journal record {rec['seq']}: a request for measurement "
                                   f"{key} that was never opened")
            slot = (rec["field"], int(rec["phase_index"]))
            out.measurements[key].pending[slot] = (rec["msg_id"], int(rec["shots"]))
            requests[rec["msg_id"]] = (key, rec["field"], int(rec["phase_index"]),
                                       int(rec["shots"]))
        elif kind in ("acquisition", "discarded", "refused"):
            key = (rec["label"], int(rec["point"]))
            m = out.measurements.get(key)
            if m is None:
                raise JournalError(f"journal record {rec['seq']}: an {kind} for measurement "
                                   f"{key} that was never opened")
            slot = (rec["field"], int(rec["phase_index"]))
            m.pending.pop(slot, None)
            if kind == "acquisition":
                if slot in m.counts:
                    raise JournalError(f"journal record {rec['seq']}: acquisition {key} {slot} "
                                       f"appears twice")
                c = rec["counts"]
                m.counts[slot] = (int(c["e"]), int(c["g"]), int(c["i"]))
                m.note_times(float(rec["t_start"]), float(rec["t_end"]))
        elif kind == "estimate":
            key = (rec["label"], int(rec["point"]))
            if key not in out.estimates:
                out.estimate_order.append(key)
            out.estimates[key] = dict(rec)
        elif kind == "proposal":
            out.proposals[int(rec["point"])] = {k: float(v) for k, v in rec["setpoints"].items()}
        elif kind == "decision":
            out.decisions[str(rec.get("what"))] = dict(rec)
    return out


def _measured(replayed: _Replayed) -> list[tuple[str, dict[str, float], InversionEstimate]]:
    """The estimates a journal holds, as (label, set-points, estimate), in their order."""
    return [(key[0], dict(replayed.estimates[key]["setpoints"]),
             InversionEstimate.from_dict(replayed.estimates[key]["estimate"]))
            for key in replayed.estimate_order]


def _tally_from(records: Iterable[Mapping[str, Any]]) -> _Tally:
    tally = _Tally()
    for rec in records:
        if rec.get("type") == "acquisition":
            tally.shots += int(rec["shots"])
            tally.rig_time_s += float(rec["t_end"]) - float(rec["t_start"])
    return tally


def _refine_detuning(session: Session, chosen: Mapping[str, float],
                     box: Mapping[str, tuple[float, float]],
                     measurement: Callable[..., Measurement],
                     estimate_of: Callable[[str, int], InversionEstimate | None],
                     seed_of: Callable[[int], int],
                     planned: Sequence[float] | None) -> dict[str, float]:
    """Measure a detuning scan through ``chosen`` and return ``chosen`` moved to its peak.

    The scan's detunings are journaled (a ``refine_plan`` decision) before the first of them
    is measured; a resume passes them back as ``planned`` and finishes the same scan.
    """
    search = session.config.search
    if planned is None:
        low, high = box["detuning"]
        centre = min(max(chosen["detuning"], low + search.refine_half_width_hz),
                     high - search.refine_half_width_hz)
        offsets = np.linspace(-search.refine_half_width_hz, search.refine_half_width_hz,
                              search.refine_points)
        planned = [float(min(max(centre + offset, low), high)) for offset in offsets]
        session.decide("refine_plan", f"detuning scan of {len(planned)} points from "
                       f"{planned[0] / 1e3:+.2f} to {planned[-1] / 1e3:+.2f} kHz",
                       detunings=planned, setpoints=dict(chosen))
    xs, ys, es = [], [], []
    for k, detuning in enumerate(planned):
        target = {**chosen, "detuning": float(detuning)}
        m = measurement("refine", k, target, session.config.measurement.shots_per_phase)
        estimate = estimate_of("refine", k) or session.measure(m, seed_of(k))
        xs.append(m.setpoints["detuning"])
        ys.append(estimate.inversion)
        es.append(estimate.inversion_stderr)
    peak = quadratic_peak(xs, ys, es)
    session.decide("refine", f"detuning scan of {len(xs)} points through the recommendation: "
                   f"peak at {peak / 1e3:+.2f} kHz (was {chosen['detuning'] / 1e3:+.2f} kHz)",
                   detunings=xs, inversions=ys)
    return {**chosen, "detuning": peak}


def run_stage(session: Session, *, stage: str, box: Mapping[str, tuple[float, float]],
              budget: Budget, n_initial_points: int,
              initial_points: Sequence[Mapping[str, float]] = (),
              check_at: Mapping[str, float] | None = None,
              still_good_above: float | None = None,
              verification_shots_per_phase: int | None = None,
              observer: Callable[[int, Strategy, Session], None] | None = None,
              refine: bool = False,
              records: Sequence[Mapping[str, Any]] = ()) -> StageOutcome:
    """Run (or resume) one stage: optional check, search, verification at the recommendation.

    Parameters
    ----------
    session : Session
        The guarded conversation with the rig.
    stage : str
        ``"calibrate"`` or ``"retune"`` (recorded, and part of the child seeds).
    box : Mapping[str, (float, float)]
        The search box, in set-point units.
    budget : Budget
        Hard limits on points, shots and rig time of the search.
    n_initial_points : int
        Size of the strategy's first design.
    initial_points : sequence of set-point dicts
        Points the first design must include (the nominal 2*pi point, the last good one).
    check_at : Mapping, optional
        Measure here first (retune). If the measured inversion reaches
        ``still_good_above``, stop with status ``"still_good"`` without searching.
    still_good_above : float, optional
        Threshold of the check (inversion units).
    verification_shots_per_phase : int, optional
        Shots per field and phase of the check and the verification (default: the
        configured ``measurement.verification_shots_per_phase``).
    observer : callable, optional
        Called as ``observer(points_told, strategy, session)`` after every told point
        (benchmark studies follow the recommendation with it; it must not touch the rig's
        set-points).
    refine : bool
        After the search, re-measure a short detuning scan through the recommendation
        (``search.refine_points`` points over +- ``search.refine_half_width_hz``) and move the
        choice to the peak of a quadratic fit of it: fresh data at one moment, so the choice
        does not lag behind a cavity drift during a long search.
    records : sequence of journal records
        Records of an earlier, killed attempt of this same stage, to resume from.

    Notes
    -----
    Resuming: the stage record fixes the box and the first design; finished points (their
    estimates) are told to the strategy once each, in their original order; a proposal or
    measurement already journaled is measured as journaled (only its missing acquisitions,
    resending any request whose reply never arrived with its own ``msg_id``); a measurement
    not started yet takes the shots per phase of the present configuration (an ``amend``
    record says so); a recommendation, detuning-scan plan or stop decision already journaled
    is kept. Budgets are those of the present configuration.
    """
    config = session.config
    seed = config.search.seed
    stage_code = {"calibrate": 1, "retune": 2}[stage]
    replayed = replay_records(records)
    measurements = replayed.measurements
    session.tally = _tally_from(records)
    told = sorted((key for key in replayed.estimate_order if key[0] == "point"),
                  key=lambda k: k[1])
    if replayed.header:
        header = replayed.header
        box = {k: (float(v[0]), float(v[1])) for k, v in header["box"].items()}
        initial_points = [dict(p) for p in header["initial_points"]]
        resend = [msg_id for m in measurements.values() for msg_id, _ in m.pending.values()]
        session.decide("resume", f"continuing {stage} from {len(records)} journal records: "
                       f"{len(replayed.estimates)} finished measurements ({len(told)} search "
                       f"points told to the strategy again, once each), {len(resend)} requests "
                       f"to ask the rig for again by their msg_id",
                       estimates=len(replayed.estimates), retold=[k[1] for k in told],
                       resend=resend)
    else:
        session.journal.append("stage", stage=stage, box={k: list(v) for k, v in box.items()},
                               initial_points=[dict(p) for p in initial_points],
                               budget=budget.__dict__, strategy=config.search.strategy,
                               seed=seed)

    shots = config.measurement.shots_per_phase
    long_shots = verification_shots_per_phase or config.measurement.verification_shots_per_phase
    wanted_shots = {"check": long_shots, "verify": long_shots}
    per_measurement = measurement_shots(len(session.phases), 1)
    session.plan_progress(stage, budget, step_shots=per_measurement * shots,
                          verify_shots=per_measurement * long_shots,
                          refine_points=config.search.refine_points
                          if refine and "detuning" in box else 0,
                          measured=_measured(replayed))
    for key, m in measurements.items():
        want = wanted_shots.get(m.label, shots)
        if key not in replayed.estimates and not m.started and m.shots_per_phase != want:
            session.journal.append("amend", label=m.label, point=m.point, shots_per_phase=want,
                                   reason=f"not started yet: shots per phase {m.shots_per_phase} "
                                          f"of the journal replaced by {want} of the present "
                                          f"configuration")
            m.shots_per_phase = want

    def measurement(label: str, point: int, setpoints: Mapping[str, float],
                    shots_per_phase: int) -> Measurement:
        key = (label, point)
        if key not in measurements:
            measurements[key] = Measurement(label, point, dict(setpoints), shots_per_phase)
            session.journal.append("measurement", label=label, point=point,
                                   setpoints=dict(setpoints), shots_per_phase=shots_per_phase)
        return measurements[key]

    def estimate_of(label: str, point: int) -> InversionEstimate | None:
        rec = replayed.estimates.get((label, point))
        return None if rec is None else InversionEstimate.from_dict(rec["estimate"])

    label_code = {"check": 1, "point": 2, "verify": 3, "refine": 4}
    check_estimate: InversionEstimate | None = None
    warm_start: list[tuple[Mapping[str, float], float, float, float | None]] = []
    if check_at is not None:
        check_estimate = estimate_of("check", 0)
        if check_estimate is None:
            m = measurement("check", 0, check_at, long_shots)
            check_estimate = session.measure(m, child_seed(seed, stage_code, label_code["check"]))
        check = measurements.get(("check", 0))
        check_setpoints = dict(check.setpoints) if check is not None else dict(check_at)
        check_clock = check.clock_s if check is not None else None
        warm_start.append((check_setpoints, check_estimate.inversion,
                           check_estimate.inversion_stderr, check_clock))
        if still_good_above is not None and check_estimate.inversion >= still_good_above:
            session.decide("still_good", f"inversion {check_estimate.inversion:.3f} (upper "
                           f"{check_estimate.inversion_high:.3f}) reaches {still_good_above:.3f}",
                           setpoints=check_setpoints)
            if any(abs(session.current.get(k, math.nan) - v) > 0.0
                   for k, v in check_setpoints.items()):
                session.move_to(check_setpoints, reason="leave the rig at the checked set-points")
            return StageOutcome("still_good", check_setpoints, check_estimate, "check passed", 0,
                                session.tally.shots, session.tally.rig_time_s, True,
                                check_estimate)
        if "search" not in replayed.decisions:
            session.decide("search", f"inversion {check_estimate.inversion:.3f} (upper "
                           f"{check_estimate.inversion_high:.3f}) below {still_good_above:.3f}")

    space = search_space(box)
    kind = config.search.strategy
    strategy = build_strategy(kind, space, config, seed=child_seed(seed, stage_code, 0),
                              n_initial_points=n_initial_points, max_points=budget.max_points,
                              initial_points=initial_points, warm_start=warm_start)
    for key in told:
        rec = replayed.estimates[key]
        est = rec["estimate"]
        strategy.tell(rec["setpoints"], float(est["inversion"]), float(est["inversion_stderr"]),
                      clock_s=rec.get("clock_s"))
    n_points = len(told)
    per_point = measurement_shots(len(session.phases), shots)
    per_point_time = per_point / session.repetition_rate_hz
    stopped = replayed.decisions.get("stop_search")
    stop_reason = str(stopped["reason"]) if stopped is not None else ""
    while not stop_reason:
        pending = measurements.get(("point", n_points))
        if pending is None:
            proposal = replayed.proposals.get(n_points)
            if proposal is None:
                if n_points >= budget.max_points:
                    stop_reason = f"point budget of {budget.max_points} reached"
                    break
                if session.tally.shots + per_point > budget.max_shots:
                    stop_reason = (f"shot budget {budget.max_shots} would be exceeded by the "
                                   f"next point")
                    break
                if session.tally.rig_time_s + per_point_time > budget.max_rig_time_s:
                    stop_reason = f"rig-time budget {budget.max_rig_time_s:g} s would be exceeded"
                    break
                if strategy.exhausted():
                    stop_reason = "the strategy's design is finished"
                    break
                proposal = {k: float(v) for k, v in strategy.ask(clock_s=session.clock).items()}
                session.journal.append("proposal", point=n_points, setpoints=proposal,
                                       strategy=strategy.name)
            pending = measurement("point", n_points, proposal, shots)
        estimate = session.measure(pending, child_seed(seed, stage_code, label_code["point"],
                                                       n_points))
        strategy.tell(pending.setpoints, estimate.inversion, estimate.inversion_stderr,
                      clock_s=pending.clock_s)
        n_points += 1
        if observer is not None:
            observer(n_points, strategy, session)
        if n_points >= budget.min_points and strategy.converged(clock_s=session.clock):
            stop_reason = "the strategy's convergence test passed"
    if stopped is None:
        session.decide("stop_search", stop_reason, points=n_points)

    recommended = replayed.decisions.get("recommend")
    drift_rate = float(getattr(strategy, "drift_rate", 0.0))
    if recommended is not None:
        chosen = {k: float(v) for k, v in recommended["setpoints"].items()}
        drift_rate = float(recommended.get("drift_rate_hz_per_s", drift_rate))
    else:
        recommendation = strategy.recommend(clock_s=session.clock)
        chosen = {k: float(v) for k, v in recommendation.point.items()}
        session.decide("recommend", "surrogate's best" if kind == "bayesian" else "best observed",
                       setpoints=chosen, predicted=finite_or_none(recommendation.value),
                       drift_rate_hz_per_s=drift_rate)
    if refine and config.search.refine_points and "detuning" in box and \
            measurements.get(("verify", 0)) is None:
        plan = replayed.decisions.get("refine_plan")
        chosen = _refine_detuning(
            session, chosen, box, measurement, estimate_of,
            lambda k: child_seed(seed, stage_code, label_code["refine"], k),
            None if plan is None else [float(x) for x in plan["detunings"]])
    existing = measurements.get(("verify", 0))
    if existing is not None:
        chosen = dict(existing.setpoints)
    verify = measurement("verify", 0, chosen, long_shots)
    final = estimate_of("verify", 0)
    if final is None:
        final = session.measure(verify, child_seed(seed, stage_code, label_code["verify"]))
    elif any(abs(session.current.get(k, math.nan) - v) > 0.0 for k, v in chosen.items()):
        session.move_to(chosen, reason="leave the rig at the verified set-points")
    accepted = final.inversion >= config.min_inversion
    status = "accepted" if accepted else "below_acceptance"
    reason = (f"verified inversion {final.inversion:.3f} vs acceptance {config.min_inversion:.3f}"
              if accepted else
              f"not accepted: the verified inversion {final.inversion:.3f} is below [acceptance] "
              f"min_inversion {config.min_inversion:.3f}; check the rig (source, detectors), the "
              f"box and [nominal] coupling_hz and waist_m and their units (Hz, m)")
    session.decide(status, reason, setpoints=chosen)
    return StageOutcome(status, chosen, final, stop_reason, n_points, session.tally.shots,
                        session.tally.rig_time_s, accepted, check_estimate, drift_rate,
                        reason=reason)


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
        ``observer(steps, strategy, session)`` after every told step (studies).
    records : sequence of journal records
        Records of an earlier attempt of this stage, to resume from (see :func:`run_stage`).
    """
    config = session.config
    seed = config.search.seed
    stage_code = {"calibrate": 1, "retune": 2}[stage]
    replayed = replay_records(records)
    measurements = replayed.measurements
    session.tally = _tally_from(records)
    verify_shots = verification_shots_per_phase or config.measurement.verification_shots_per_phase
    check_shots = check_shots_per_phase or verify_shots
    default_shots = {"check": check_shots, "verify": verify_shots, "correct": verify_shots}
    lock_prior = None if prior is None else LockPrior.from_dict(prior)
    order = sorted((key for key in replayed.estimate_order if key[0] in GUIDED_LABELS),
                   key=lambda k: k[1])
    if replayed.header:
        header = replayed.header
        box = {k: (float(v[0]), float(v[1])) for k, v in header["box"].items()}
        start = {k: float(v) for k, v in header["start"].items()}
        lock_prior = None if header.get("prior") is None else LockPrior.from_dict(header["prior"])
        resend = [msg_id for m in measurements.values() for msg_id, _ in m.pending.values()]
        session.decide("resume", f"continuing {stage} from {len(records)} journal records: "
                       f"{len(order)} finished steps told to the strategy again, once each, "
                       f"{count_text(len(resend), 'request')} to ask the rig for again by their "
                       f"msg_id",
                       estimates=len(replayed.estimates), retold=[],
                       steps=[k[1] for k in order], resend=resend)
    else:
        session.journal.append("stage", stage=stage, box={k: list(v) for k, v in box.items()},
                               initial_points=[dict(start)], start=dict(start),
                               prior=None if lock_prior is None else lock_prior.to_dict(),
                               budget=budget.__dict__, strategy="phase_lock", seed=seed)
    lock = PhaseLockSearch(search_space(box), seed=child_seed(seed, stage_code, 0), start=start,
                           settings=lock_settings(config, box), prior=lock_prior)
    phases = len(session.phases)
    session.plan_progress(stage, budget,
                          # A step may take up to step_shots_range's top multiple of its
                          # configured shots (sized from the measured error per shot).
                          step_shots=2 * phases * math.ceil(
                              lock.settings.step_shots_range[1]
                              * max(config.lock.lock_shots_per_phase,
                                    config.lock.velocity_shots_per_phase)),
                          verify_shots=measurement_shots(phases, verify_shots), measured=_measured(replayed))

    def result_of(rec: Mapping[str, Any], m: Measurement | None) -> PointResult:
        estimate = InversionEstimate.from_dict(rec["estimate"])
        shots = rec.get("shots") or (measurement_shots(phases, m.shots_per_phase) if m is not None else 1)
        return PointResult.from_estimate(estimate, clock_s=rec.get("clock_s"), shots=int(shots))

    steps = 0
    searched = 0
    final: tuple[dict[str, float], InversionEstimate] | None = None
    check: InversionEstimate | None = None
    # Verifications (and corrections) since the search last stopped: a verification that
    # misses the acceptance bar sends the stage back to its search while the budget lasts.
    verifications = 0
    # A verification is measured in two halves: the first half of one whose second half has
    # not been measured yet (None otherwise). See _first_half_settles.
    half: Measurement | None = None
    first_half_shots = max(1, verify_shots // 2)

    def note_final(label: str, m: Measurement, estimate: InversionEstimate) -> None:
        nonlocal final, verifications, half
        if label == "verify" and half is not None and half.setpoints == m.setpoints:
            # The second half: the verification is both halves' counts, estimated as one.
            final = (dict(m.setpoints), _pooled_estimate(session, half, m, child_seed(
                seed, stage_code, 6, m.point)))
            half = None
            return
        final = (dict(m.setpoints), estimate)
        verifications += 1
        half = m if label == "verify" and m.shots_per_phase < verify_shots else None

    for key in order:
        rec = replayed.estimates[key]
        lock.observe(rec["setpoints"], result_of(rec, measurements.get(key)), purpose=key[0])
        steps = key[1] + 1
        estimate = InversionEstimate.from_dict(rec["estimate"])
        if key[0] in ("verify", "correct"):
            note_final(key[0], measurements[key], estimate)
        elif key[0] == "check":
            check = estimate
        else:
            searched += 1
            final, verifications, half = None, 0, None

    def run_step(label: str, setpoints: Mapping[str, float], shots_per_phase: int
                 ) -> InversionEstimate:
        nonlocal steps, searched, final, check, verifications, half
        key = (label, steps)
        m = measurements.get(key)
        if m is None:
            m = Measurement(label, steps, dict(setpoints), shots_per_phase)
            measurements[key] = m
            session.journal.append("measurement", label=label, point=steps,
                                   setpoints=dict(setpoints), shots_per_phase=shots_per_phase)
        estimate = session.measure(m, child_seed(seed, stage_code, 5, steps))
        result = PointResult.from_estimate(estimate, clock_s=m.clock_s,
                                           shots=measurement_shots(phases, m.shots_per_phase))
        lock.observe(m.setpoints, result, purpose=label)
        steps += 1
        if label in ("verify", "correct"):
            note_final(label, m, estimate)
        elif label == "check":
            check = estimate
        else:
            searched += 1
            final, verifications, half = None, 0, None
            if observer is not None:
                observer(searched, lock, session)
        return estimate

    stop_reason = str(replayed.decisions["stop_search"]["reason"]) \
        if "stop_search" in replayed.decisions else ""
    again = replayed.decisions.get("search_again")
    if again is not None and (not stop_reason or int(replayed.decisions["stop_search"]["seq"])
                              < int(again["seq"])):
        # The search went on after a verification missed the bar and has not stopped since.
        stop_reason = ""
    verdict_done = "verdict" in replayed.decisions
    while True:
        pending = next((m for (label, point), m in measurements.items()
                        if point == steps and label in GUIDED_LABELS), None)
        if pending is not None:
            run_step(pending.label, pending.setpoints, pending.shots_per_phase)
            continue
        now = session.clock
        if stage == "retune" and check is not None and not verdict_done and final is None:
            verdict = lock.verdict(clock_s=now)
            verdict_done = True
            session.decide("verdict", verdict.reason, still_good=verdict.still_good,
                           in_range=verdict.in_range, numbers=verdict.to_dict())
            if verdict.still_good and check.inversion < config.min_inversion:
                # A check is accepted as a verification is: its inversion must reach the bar.
                session.decide("check_below_acceptance",
                               f"the check's inversion {check.inversion:.3f} is below "
                               f"[acceptance] min_inversion {config.min_inversion:.3f}: the "
                               "retune searches")
            elif verdict.still_good:
                check_m = next(m for (label, _), m in measurements.items() if label == "check")
                if any(abs(session.current.get(k, math.nan) - v) > 0.0
                       for k, v in check_m.setpoints.items()):
                    session.move_to(check_m.setpoints, reason="leave the rig at the checked "
                                                              "set-points")
                session.decide("still_good", verdict.reason, setpoints=check_m.setpoints,
                               predicted_shortfall=shortfall_numbers(verdict.shortfall))
                return StageOutcome("still_good", dict(check_m.setpoints), check,
                                    "check passed", searched, session.tally.shots,
                                    session.tally.rig_time_s, True, check,
                                    predicted_shortfall=shortfall_numbers(verdict.shortfall),
                                    reason=f"still good: {verdict.reason}")
            continue
        if final is not None:
            correction = lock.correction(clock_s=now) \
                if verifications <= config.lock.max_corrections else None
            if correction is None and half is not None:
                settled = _first_half_settles(lock, config, final)
                second = verify_shots - half.shots_per_phase
                if settled is None:
                    expected = lock.expected_after(final[0], second, clock_s=None)
                    bar = _acceptance_bar(config)
                    if bar >= 1.0 or expected.upper <= bar:
                        session.decide("verify_second_half", "the first half of the verification "
                                       "does not settle the acceptance: its second half "
                                       f"({measurement_shots(phases, second):,} shots) at the same "
                                       "set-points "
                                       f"(expected bound after it {expected.upper:.2%})",
                                       setpoints=final[0])
                        session.expect_verify_rest(0)
                        run_step("verify", final[0], second)
                        continue
                    settled = (f"the verification's first half leaves {_bound_text(expected)} "
                               f"expected after its second half, above the bar {bar:.1%}: no "
                               "second half")
                session.decide("verify_first_half_settles", settled, setpoints=final[0])
                half = None
            if correction is None:
                again = _search_again(lock, config, budget, session, final, searched, phases)
                if again is None:
                    break
                session.decide("search_again", again, setpoints=final[0], points=searched)
                final, verifications, stop_reason = None, 0, ""
                continue
            session.decide("correct", correction.reason, setpoints=correction.point,
                           **{"from": final[0]})
            run_step("correct", correction.point,
                     correction.shots_per_phase or default_shots["correct"])
            continue
        if not stop_reason:
            shortfall = lock.shortfall(clock_s=now)
            bound = _bound_text(shortfall)
            hopeless = lock.hopeless(clock_s=now, points_left=budget.max_points - searched,
                                     acceptance_bar=_acceptance_bar(config),
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
                shots = proposal.shots_per_phase or default_shots.get(
                    proposal.purpose, config.measurement.shots_per_phase)
                if session.tally.shots + measurement_shots(phases, shots) > budget.max_shots:
                    stop_reason = (f"shot budget {budget.max_shots} would be exceeded by the "
                                   f"next step; {bound}")
                else:
                    session.journal.append("proposal", point=steps, setpoints=proposal.point,
                                           strategy="phase_lock", purpose=proposal.purpose,
                                           reason=proposal.reason, shots_per_phase=shots)
                    run_step(proposal.purpose, proposal.point, shots)
                    continue
            session.decide("stop_search", stop_reason, points=searched,
                           shortfall=shortfall.to_dict(), learned=lock.state(clock_s=now))
        verify_duration = measurement_shots(phases, verify_shots) / session.repetition_rate_hz
        recommendation = lock.recommend(clock_s=now + 0.5 * verify_duration)
        chosen = {k: float(v) for k, v in recommendation.point.items()}
        session.decide("recommend", "the phase lock's posterior: detuning where the phase "
                       "shift is at its peak value, velocity of the highest inversion",
                       setpoints=chosen, predicted=finite_or_none(recommendation.value))
        session.expect_verify_rest(measurement_shots(phases, verify_shots - first_half_shots))
        run_step("verify", chosen, first_half_shots)
    assert final is not None
    chosen, estimate = final
    if any(abs(session.current.get(k, math.nan) - v) > 0.0 for k, v in chosen.items()):
        session.move_to(chosen, reason="leave the rig at the verified set-points")
    learned = lock.learned_prior(clock_s=session.clock)
    # The stage vouches for its choice only with every observation told, the verification's
    # included: the bound at the chosen set-points now, the lock, the box, the inversion.
    # At the verification's own moment (clock None: the last result's), so that a drift term
    # fitted to a few points is not extrapolated past what was verified.
    final_short = lock.shortfall(clock_s=None, point=chosen)
    # The acceptance bar is the goal itself (still_good_shortfall, 2 %: >= 0.98 of the best);
    # the stop's target_shortfall is stricter to leave room for the drift and the verification.
    max_shortfall = _acceptance_bar(config)
    # A bound of 100 % vouches for nothing: such a setting checks the verified inversion only.
    problems = lock.acceptance_problems(chosen, clock_s=None,
                                        max_shortfall=max_shortfall) if max_shortfall < 1.0 else []
    if estimate.inversion < config.min_inversion:
        problems.append((f"the verified inversion {estimate.inversion:.3f} is below [acceptance] "
                         f"min_inversion {config.min_inversion:.3f}",
                         "the rig (source, detectors) and [acceptance] min_inversion"))
    accepted = not problems
    reason = acceptance_reason(estimate.inversion, final_short, problems)
    status = "accepted" if accepted else "below_acceptance"
    session.decide(status, reason, setpoints=chosen,
                   learned=None if learned is None else learned.to_dict(),
                   predicted_shortfall=shortfall_numbers(final_short),
                   problems=[p for p, _ in problems])
    outcome = StageOutcome(status, chosen, estimate, stop_reason or "verified after a "
                           "correction", searched, session.tally.shots,
                           session.tally.rig_time_s, accepted, check,
                           predicted_shortfall=shortfall_numbers(final_short), reason=reason)
    return dataclasses.replace(outcome, lock_prior=None if learned is None else learned.to_dict())


def _pooled_estimate(session: Session, first: Measurement, second: Measurement,
                     seed: int) -> InversionEstimate:
    """One estimate from two measurements at the same set-points (their counts summed)."""
    fringes = []
    for field_state in FIELDS:
        a, b = session.fringe(first, field_state), session.fringe(second, field_state)
        fringes.append(FringeData.from_counts(a.ramsey_phase, a.e + b.e, a.g + b.g, a.i + b.i))
    cfg = session.config.measurement
    return estimate_inversion(*fringes, confidence=cfg.confidence, seed=seed,
                              resamples=cfg.resamples)


def _first_half_settles(lock: PhaseLockSearch, config: RunConfig,
                        final: tuple[dict[str, float], InversionEstimate]) -> str | None:
    """Why the verification's first half already settles the stage, or None.

    The verification is measured in two halves; the second is skipped when the first, with
    every result told, settles the verdict either way:

    - accepted: no acceptance problem (the bound within the bar, the lock, the velocity model,
      the box) and the first half's own inversion clears ``[acceptance] min_inversion`` by
      ``z`` standard errors (``z`` at the two-sided level of the lock's confidence: one of two
      looks at the same point, Bonferroni);
    - not accepted whatever the second half says: a problem that more shots at this point
      cannot mend (no lock, no velocity model, an optimum beyond the box), or an inversion
      ``z`` standard errors below ``min_inversion``.

    Only the fresh shots at the chosen set-points count for the inversion: the earlier points
    near it chose it (the recommendation is the maximum of a curve fitted to them), so their
    inversions are biased upward there. The bound is the posterior of every result, which the
    order and the choice of the points do not bias under the model (each choice depends only
    on data already seen).
    """
    chosen, estimate = final
    z = float(stats.norm.ppf(1.0 - 0.5 * (1.0 - lock.settings.confidence)))
    low = estimate.inversion - z * estimate.inversion_stderr
    high = estimate.inversion + z * estimate.inversion_stderr
    head = "the verification's first half settles it"
    bar = _acceptance_bar(config)
    # A bar of 100 % vouches for nothing: the stage then checks the verified inversion only.
    structural = lock.acceptance_problems(chosen, clock_s=None, max_shortfall=math.inf) \
        if bar < 1.0 else []
    if structural:
        return f"{head}: not accepted whatever its second half says ({structural[0][0]})"
    if high < config.min_inversion:
        return (f"{head}: not accepted whatever its second half says (inversion "
                f"{estimate.inversion:.3f}, plus {z:.2f} standard errors {high:.3f}, below "
                f"[acceptance] min_inversion {config.min_inversion:.3f})")
    bound = lock.shortfall(clock_s=None, point=chosen)
    if (bar < 1.0 and not bound.upper <= bar) or low < config.min_inversion:
        return None
    return (f"{head}: inversion {estimate.inversion:.3f} (minus {z:.2f} standard errors "
            f"{low:.3f}, at least [acceptance] min_inversion {config.min_inversion:.3f}); "
            f"{_bound_text(bound)} within {bar:.1%}")


def _acceptance_bar(config: RunConfig) -> float:
    """The bound a stage's verified choice must meet: ``[acceptance] max_shortfall``, else
    ``[lock] still_good_shortfall`` (the goal itself, 2 %: >= 0.98 of the best)."""
    return config.max_shortfall if config.max_shortfall is not None else config.lock.still_good_shortfall


def _search_again(lock: PhaseLockSearch, config: RunConfig, budget: Budget, session: Session,
                  final: tuple[dict[str, float], InversionEstimate], searched: int,
                  phases: int) -> str | None:
    """Why the search should go on after its verification, or None (the stage ends).

    It goes on when the verified choice's bound (every result told) misses the acceptance bar
    while more points could lower it: the lock and the velocity model were established, the
    velocity optimum is not beyond the box, and the point, shot and rig-time budgets leave
    room for another step. Otherwise the stage is judged as it stands (also when the verified
    inversion is below ``[acceptance] min_inversion``: that says the rig, not the search).
    """
    chosen, estimate = final
    bar = _acceptance_bar(config)
    if bar >= 1.0 or estimate.inversion < config.min_inversion:
        return None
    short = lock.shortfall(clock_s=None, point=chosen)
    if short.upper <= bar:
        return None
    # Only a bound above the bar is something more points can mend: any other problem (no
    # lock, no velocity model, an optimum beyond the box) ends the stage as it stands.
    if lock.acceptance_problems(chosen, clock_s=None, max_shortfall=math.inf):
        return None
    # Nor when the points have nothing left to lower (a retune's inherited velocity term).
    if lock.hopeless(clock_s=session.clock, points_left=budget.max_points - searched,
                     acceptance_bar=bar) is not None or lock.converged(clock_s=session.clock):
        return None
    if searched >= budget.max_points or session.tally.rig_time_s >= budget.max_rig_time_s:
        return None
    proposal = lock.propose(clock_s=session.clock)
    shots = proposal.shots_per_phase or config.measurement.shots_per_phase
    if session.tally.shots + measurement_shots(phases, shots) > budget.max_shots:
        return None
    return (f"the verified choice's {_bound_text(short)} misses the acceptance bar {bar:.1%}; "
            f"the budget has room ({searched} of {budget.max_points} points): searching on")


def _bound_text(shortfall: Shortfall) -> str:
    if not math.isfinite(shortfall.upper):
        return (f"predicted shortfall not bounded yet ({shortfall.note or 'no model'})")
    return (f"predicted shortfall {shortfall.estimate:.2%}, bound {shortfall.upper:.2%} "
            f"({shortfall.confidence:.0%})")


def shortfall_numbers(shortfall: Shortfall) -> dict[str, Any]:
    """The predicted shortfall as numbers for result.json and the journal (None: unbounded).

    Keys: ``estimate``, ``upper`` (the bound at ``confidence``), ``confidence``, and the terms
    ``detuning``, ``detuning_upper``, ``velocity``, ``velocity_upper``.
    """
    out = shortfall.to_dict()
    return {key: out[key] for key in ("estimate", "upper", "confidence", "detuning",
                                      "detuning_upper", "velocity", "velocity_upper", "note")}


def acceptance_reason(inversion: float, shortfall: Shortfall,
                      problems: Sequence[tuple[str, str]]) -> str:
    """One line: why a stage was accepted, or why not and what to check."""
    if not problems:
        return (f"verified inversion {inversion:.3f}; {_bound_text(shortfall)} within the target")
    checks: list[str] = []
    for _, check in problems:
        if check not in checks:
            checks.append(check)
    return ("not accepted: " + "; ".join(p for p, _ in problems)
            + "; check " + "; ".join(checks))
