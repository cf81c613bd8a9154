"""The checks of a stage or a night before the first move, and the first calls to the rig: the
run config against the rig's description and the last good store, a resume's changes, a
failure settled with the rig sent to its safe set-points."""

from __future__ import annotations

import os
import tempfile
import threading
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

from autotune.config import RunConfig
from autotune.errors import AutotuneError, ConfigError, JournalError, RigLeased
from autotune.analysis.guided import LockPrior
from autotune.run.journal import JOURNAL_NAME
from autotune.run.guard import effective_limit
from autotune.run.session import Session, call_with_recovery
from autotune.wire.protocol import SetpointLimit
from autotune.wire.rig import Rig, measurement_shots

__all__ = ["preflight", "track_preflight", "resume_changes", "opening_call", "settle_failure",
           "never_started"]


# Configuration keys a resume may change (dotted prefixes): budgets, shots of measurements not
# started yet, waits and retries, decision thresholds, limits (the guards check every move
# again), the store. Anything else would change the meaning of what was already measured.
_RESUMABLE_CHANGES = (
    "bus.",
    "search.max_points", "search.max_shots", "search.max_rig_time_s", "search.min_points",
    "measurement.shots_per_phase", "measurement.verification_shots_per_phase",
    "measurement.confidence", "measurement.resamples",
    "acceptance.min_inversion", "acceptance.on_reject",
    "calibration.store",
    "retune.max_points", "retune.max_shots", "retune.check_shots_per_phase",
    "retune.still_good_fraction",
    "recovery.",
    "lock.max_corrections", "lock.lock_shots_per_phase", "lock.velocity_shots_per_phase",
)
_LIMIT_KEYS = ("limit_min", "limit_max", "max_step")


# -- checks before the first move ---------------------------------------------------------

def _check_store(store: Path, source: str) -> ConfigError | None:
    """None if the store's folder exists (or was created) and a file can be written there."""
    folder = Path(store).parent
    if Path(store).is_dir():
        return ConfigError(source, "calibration.store", "a file path, not a folder", str(store))
    for parent in (folder, *folder.parents):
        if parent.exists():
            if not parent.is_dir():
                return ConfigError(source, "calibration.store",
                                   f"a path whose folders can exist ({parent} is a file)",
                                   str(store))
            break
    try:
        folder.mkdir(parents=True, exist_ok=True)
        handle, probe = tempfile.mkstemp(prefix=".autotune-probe-", dir=folder)
        os.close(handle)
        os.unlink(probe)
    except OSError as exc:
        return ConfigError(source, "calibration.store", "a folder this user can write",
                           f"{folder}: {exc.strerror or exc}")
    return None


def _limits(config: RunConfig, description: Any, problems: list[ConfigError]
            ) -> dict[str, SetpointLimit]:
    source = config.source
    limits: dict[str, SetpointLimit] = {}
    for sp in config.setpoints:
        key = f"setpoints.{sp.name}"
        described = description.setpoints.get(sp.name)
        if described is None:
            problems.append(ConfigError(source, key, "a set-point the rig describes ("
                                        + ", ".join(sorted(description.setpoints)) + ")",
                                        sp.name))
            continue
        if described.unit != sp.unit:
            problems.append(ConfigError(source, f"{key}.unit",
                                        f"the rig's unit {described.unit!r}", sp.unit))
            continue
        limit = effective_limit(sp, described)
        if limit is None or limit.min >= limit.max:
            problems.append(ConfigError(
                source, f"{key}.limit_min/limit_max",
                f"limits that overlap the rig's [{described.min:g}, {described.max:g}] "
                f"{sp.unit}", [sp.limit_min, sp.limit_max]))
            continue
        safe = (getattr(description, "safe_setpoints", None) or {}).get(sp.name)
        # (a float's rounding of a safe value converted from its channel is no excursion)
        slack = 1e-9 * max(abs(sp.limit_min), abs(sp.limit_max), 1.0)
        if safe is not None and not sp.limit_min - slack <= float(safe) <= sp.limit_max + slack:
            # A stop sends the rig to its safe set-points by its own procedure: limits that
            # exclude them would be left at every stop.
            problems.append(ConfigError(
                source, f"{key}.limit_min/limit_max",
                f"limits that hold the rig's safe set-point {float(safe):g} {sp.unit} (every "
                f"stop sends the rig there)", [sp.limit_min, sp.limit_max]))
        if sp.search_min < limit.min or sp.search_max > limit.max:
            problems.append(ConfigError(
                source, f"{key}.search_min/search_max",
                f"a box within the effective limits [{limit.min:g}, {limit.max:g}] {sp.unit}",
                [sp.search_min, sp.search_max]))
        limits[sp.name] = limit
    return limits


def _box_problems(config: RunConfig) -> list[ConfigError]:
    """A detuning box the phase lock cannot work in: narrower than a tenth of its first step
    (the lock halves its step to fit a narrow box, but a box of a few hundred hertz is below
    what one check resolves; most often kHz values typed in a box in Hz). Not on a resume:
    neither the box nor the step can change then, and a run started before this check would be
    left with no way to continue."""
    if config.search.strategy != "phase_lock":
        return []
    least = 0.1 * config.lock.bracket_step_hz
    problems = []
    for sp in config.setpoints:
        if sp.name == "detuning" and sp.search_max - sp.search_min < least:
            problems.append(ConfigError(
                config.source, "setpoints.detuning.search_min/search_max",
                f"a box at least a tenth of the lock's first step wide ({least:g} {sp.unit}; "
                f"[lock] bracket_step_hz = {config.lock.bracket_step_hz:g}; values in "
                f"{sp.unit})", [sp.search_min, sp.search_max]))
    return problems


def _last_good_problems(config: RunConfig, limits: Mapping[str, Any], store: Path,
                        last_good: Mapping[str, Any]) -> list[ConfigError]:
    """A last good calibration to start from: each set-point there and within the limits."""
    problems = []
    for sp in config.setpoints:
        value = last_good["setpoints"].get(sp.name)
        if value is None:
            problems.append(ConfigError(str(store), f"setpoints.{sp.name}",
                                        "a value in the last good calibration", None))
        elif sp.name in limits and not limits[sp.name].min <= value <= limits[sp.name].max:
            limit = limits[sp.name]
            problems.append(ConfigError(str(store), f"setpoints.{sp.name}",
                                        f"a value within the effective limits "
                                        f"[{limit.min:g}, {limit.max:g}] {sp.unit}", value))
    return problems


def never_started(run_dir: Path) -> None:
    """Refuse, before the rig is asked anything, the resume of a folder where no run began
    (no journal: a run whose rig never answered its first calls writes none), saying how to
    start it.

    Raises
    ------
    JournalError
        ``run_dir`` holds no journal.
    """
    if not (Path(run_dir) / JOURNAL_NAME).exists():
        raise JournalError(f"{run_dir}: no run began there (it holds no {JOURNAL_NAME}); "
                           f"nothing to resume: start the run with --out {run_dir}")


def opening_call(what: str, call: Callable[[], Any], config: RunConfig, rig: Rig,
                 stop: threading.Event | None) -> Any:
    """A rig call before the run's journal exists (its ``describe``, its first ``status``),
    through the same recovery as every later call; its retries are logged only."""
    return call_with_recovery(what, lambda _id: call(), config.recovery, rig=rig, stop=stop)


def settle_failure(session: Session, exc: Exception, status: str) -> str:
    """A run stops on ``exc`` (not a signal): journal why, send the rig to its safe set-points,
    and return the status its ``end`` record gets. A store that failed after the run finished
    keeps ``store_failed`` and the rig at the verified set-points."""
    if isinstance(exc, JournalError):
        if status == "store_failed":
            return status
        _note_safe(exc, session.go_safe("the run folder could not be written"))
        return "aborted"
    if isinstance(exc, RigLeased):
        # The lease ran out and another client holds the rig now: its run, not ours, decides
        # where the rig goes, so this one stops without sending safe.
        session.decide("abort", f"{exc}; the rig belongs to another client now, so it is not "
                                f"sent to its safe set-points by this run")
        return "aborted"
    if isinstance(exc, AutotuneError):
        session.decide("abort", str(exc))
        _note_safe(exc, session.go_safe(f"aborted: {exc}"))
        return "aborted"
    session.decide("abort", f"internal error: {type(exc).__name__}: {exc}")
    _note_safe(exc, session.go_safe(f"internal error: {type(exc).__name__}"))
    return "failed"


def _note_safe(exc: Exception, outcome: tuple[bool, str]) -> None:
    """Keep on ``exc`` whether the rig confirmed its safe set-points (``rig_safe``) and the
    error if it did not (``rig_safe_detail``), for the command's last message."""
    try:
        exc.rig_safe, exc.rig_safe_detail = outcome  # type: ignore[attr-defined]
    except AttributeError:  # an exception type without a __dict__: nothing to say then
        pass


def preflight(command: str, config: RunConfig, description: Any, *, store: Path,
              last_good: Mapping[str, Any] | None = None, resume: bool = False
              ) -> list[ConfigError]:
    """Everything that can be checked before the first set-point is sent, all at once.

    Parameters
    ----------
    command : {"calibrate", "retune"}
        The stage to run.
    config : RunConfig
        The checked configuration.
    description : Description
        The rig's describe reply.
    store : Path
        Where the last good calibration will be written (its folder is created if missing).
    last_good : Mapping, optional
        The last good calibration a retune starts from (already read).

    Returns
    -------
    list of ConfigError
        Every problem found (empty when the run may start).
    """
    source = config.source
    problems: list[ConfigError] = []
    limits = _limits(config, description, problems)
    most = int(getattr(description, "max_shots_per_acquisition", 0) or 0)
    if most:
        shots = [("measurement.shots_per_phase", config.measurement.shots_per_phase),
                 ("measurement.verification_shots_per_phase",
                  config.measurement.verification_shots_per_phase)]
        if command == "retune":
            shots.append(("retune.check_shots_per_phase", config.retune.check_shots_per_phase))
        if config.search.strategy == "phase_lock":
            shots += [("lock.lock_shots_per_phase", config.lock.lock_shots_per_phase),
                      ("lock.velocity_shots_per_phase", config.lock.velocity_shots_per_phase)]
        for key, value in shots:
            if value > most:
                problems.append(ConfigError(source, key, f"at most the rig's "
                                            f"max_shots_per_acquisition = {most}", value))
    per_point = measurement_shots(config.measurement.ramsey_phases,
                                 config.measurement.shots_per_phase)
    budget_key, budget = (("retune.max_shots", config.retune.max_shots) if command == "retune"
                          else ("search.max_shots", config.search.max_shots))
    if per_point > budget:
        problems.append(ConfigError(source, budget_key, f"room for one point of {per_point} "
                                    f"shots (2 fields x {config.measurement.ramsey_phases} "
                                    f"phases x {config.measurement.shots_per_phase})", budget))
    if not resume:  # a resume keeps the box and the lock's step it started with
        problems += _box_problems(config)
    store_problem = _check_store(store, source)
    if store_problem is not None:
        problems.append(store_problem)
    if command == "retune" and last_good is not None:
        problems += _last_good_problems(config, limits, store, last_good)
    return problems


def track_preflight(config: RunConfig, description: Any, *, store: Path,
                    last_good: Mapping[str, Any] | None, resume: bool = False
                    ) -> list[ConfigError]:
    """Everything ``autotune track`` can check before its first move, all at once.

    The limits, units and search box (as for a calibration, which a night may need), every
    shot count a night can send against the rig's ``max_shots_per_acquisition`` (its checks
    are planned within it), room for one point in the calibration's and the retune's shot
    budgets, that the checks' least shots fit the beam-time budget at the longest interval,
    that the store can be written, and a last good calibration it starts from: its set-points
    within the effective limits and its lock prior readable (a store without one makes the
    night start with a calibration, which is not a problem).
    """
    source = config.source
    problems: list[ConfigError] = []
    limits = _limits(config, description, problems)
    track = config.track
    most = int(getattr(description, "max_shots_per_acquisition", 0) or 0)
    if most:
        for key, value in (("measurement.shots_per_phase", config.measurement.shots_per_phase),
                           ("measurement.verification_shots_per_phase",
                            config.measurement.verification_shots_per_phase),
                           ("lock.lock_shots_per_phase", config.lock.lock_shots_per_phase),
                           ("lock.velocity_shots_per_phase", config.lock.velocity_shots_per_phase),
                           ("track.retune_shots_per_phase", track.retune_shots_per_phase),
                           ("track.min_shots_per_phase", track.min_shots_per_phase)):
            if value > most:
                problems.append(ConfigError(source, key, f"at most the rig's "
                                            f"max_shots_per_acquisition = {most}", value))
    phases = config.measurement.ramsey_phases
    for key, budget, per_phase in (
            ("search.max_shots", config.search.max_shots, config.lock.lock_shots_per_phase),
            ("retune.max_shots", config.retune.max_shots, config.lock.lock_shots_per_phase)):
        if measurement_shots(phases, per_phase) > budget:
            problems.append(ConfigError(source, key, f"room for one lock step of "
                                        f"{measurement_shots(phases, per_phase)} shots (2 fields x {phases} "
                                        f"phases x lock.lock_shots_per_phase {per_phase})", budget))
    rate = float(description.repetition_rate_hz)
    least_check_s = measurement_shots(phases, track.min_shots_per_phase) / rate
    affordable = 0.5 * track.budget_fraction * track.max_interval_s
    if least_check_s > affordable:
        problems.append(ConfigError(
            source, "track.min_shots_per_phase",
            f"checks that fit half of track.budget_fraction ({track.budget_fraction:g}) at "
            f"track.max_interval_s ({track.max_interval_s:g} s): at most "
            f"{int(affordable * rate / measurement_shots(phases, 1))} shots per phase at {rate:g} shots/s",
            track.min_shots_per_phase))
    if not resume:  # a resume keeps the box and the lock's step it started with
        problems += _box_problems(config)
    store_problem = _check_store(store, source)
    if store_problem is not None:
        problems.append(store_problem)
    if last_good is not None:
        problems += _last_good_problems(config, limits, store, last_good)
        prior = last_good.get("lock_prior")
        if prior is not None:
            try:
                LockPrior.from_dict(prior)
            except ValueError as exc:
                problems.append(ConfigError(str(store), "lock_prior",
                                            "the lock prior a calibration stored", str(exc)))
    return problems


def _flatten(data: Any, prefix: str = "") -> Iterator[tuple[str, Any]]:
    if isinstance(data, Mapping):
        for key, value in data.items():
            yield from _flatten(value, f"{prefix}{key}.")
    else:
        yield prefix[:-1], data


def resume_changes(started: Mapping[str, Any], present: Mapping[str, Any], source: str,
                   also_allowed: Sequence[str] = ()
                   ) -> tuple[list[tuple[str, Any, Any]], list[ConfigError]]:
    """Configuration changes between the run's start and its resume, sorted into allowed ones
    and refusals.

    Allowed: budgets, shots of measurements not started yet, bus waits and retries, recovery,
    decision thresholds, set-point limits (every move is checked again), the store. Anything
    else (the box, units, strategy, seed, phases, nominal physics, retune widths) would change
    the meaning of what was measured already and is refused, naming the key and both values.
    ``also_allowed`` adds dotted prefixes a command may change on resume (``track.`` for
    ``autotune track``).
    """
    before, after = dict(_flatten(started)), dict(_flatten(present))
    allowed: list[tuple[str, Any, Any]] = []
    refused: list[ConfigError] = []
    for key in sorted(set(before) | set(after)):
        old, new = before.get(key), after.get(key)
        if old == new:
            continue
        limit_key = key.startswith("setpoints.") and key.rsplit(".", 1)[-1] in _LIMIT_KEYS
        if limit_key or any(key == p or (p.endswith(".") and key.startswith(p))
                            for p in (*_RESUMABLE_CHANGES, *also_allowed)):
            allowed.append((key, old, new))
        else:
            refused.append(ConfigError(
                source, key, f"the value the run started with ({old!r}): a resume cannot change "
                             f"it; start a new run to use another", new))
    return allowed, refused
