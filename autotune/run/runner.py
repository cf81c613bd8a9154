"""One stage as a run: checks before the first move, run folder, manifest, result, last good.

This is the imperative shell around :func:`autotune.run.loop.run_stage`. A stage runs in two steps:

1. :func:`prepare` talks to the rig only to ask it to describe itself and checks everything that
   can be checked before a set-point is sent (units, limits, the search box, shots per
   acquisition against the rig's limit, budgets, the last good calibration of a retune, the
   store's folder, and on a resume the journal and every configuration change). It writes
   nothing into the run folder; every problem found is reported together
   (:class:`autotune.errors.ConfigErrors`).
2. :func:`execute` creates (or reopens) the run folder, runs the stage and writes
   ``result.json`` and the last good calibration.

:func:`calibrate` and :func:`retune` do both in one call (studies and tests); the CLI calls the
two steps so that a refused run leaves no run folder behind.

The last good calibration (``[calibration] store``) is a small JSON file::

    {"setpoints": {...}, "inversion": float, "inversion_low": float, "inversion_high": float,
     "run_dir": str, "t_wall": str, "rig": str}

It is replaced (atomically) only by an accepted calibration or retune.
"""

from __future__ import annotations

import math
import os
import platform
import tempfile
import threading
import time
import uuid
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any

import structlog

from autotune import __version__
from autotune.config import RunConfig
from autotune.errors import (
    AutotuneError,
    ConfigError,
    ConfigErrors,
    Interrupted,
    JournalError,
    RigLeased,
)
from autotune.analysis.guided import LockPrior
from autotune.run.journal import (
    JOURNAL_NAME,
    MANIFEST_NAME,
    RESULT_NAME,
    RESUMABLE,
    Journal,
    ended_error,
    read_journal,
    read_json,
    utc_now,
    write_json_atomic,
)
from autotune.run.loop import (
    Budget,
    Limit,
    Session,
    StageOutcome,
    call_with_recovery,
    retune_box,
    run_guided_stage,
    run_stage,
)
from autotune.progress import ProgressObserver
from autotune.wire.rig import Rig

__all__ = ["calibrate", "retune", "prepare", "execute", "Prepared", "read_last_good",
           "describe_to_dict", "preflight", "track_preflight", "resume_changes",
           "STAGE_COMMANDS", "opening_call", "read_run_files"]

_log = structlog.get_logger(__name__)

#: The commands that run one stage.
STAGE_COMMANDS = ("calibrate", "retune")

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


def _versions() -> dict[str, str]:
    versions = {"autotune": __version__, "python": platform.python_version()}
    for dist in ("numpy", "scipy", "pyzmq", "scikit-optimize", "scikit-learn", "structlog"):
        try:
            versions[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            versions[dist] = "not installed"
    return versions


def describe_to_dict(description: Any) -> dict[str, Any]:
    """The describe reply as plain JSON-ready data (dataclasses and mappings unfolded)."""
    return {
        "rig": description.rig,
        "proto": description.proto,
        "simulated": description.simulated,
        "setpoints": {name: asdict(limit) for name, limit in description.setpoints.items()},
        "fields": list(description.fields),
        "repetition_rate_hz": description.repetition_rate_hz,
        "safe_setpoints": dict(description.safe_setpoints),
        "instance": getattr(description, "instance", None),
        "max_shots_per_acquisition": getattr(description, "max_shots_per_acquisition", None),
    }


def read_last_good(path: Path) -> dict[str, Any]:
    """The last good calibration, checked.

    Raises
    ------
    ConfigError
        The store is missing or does not hold set-points and an inversion.
    """
    try:
        data = read_json(path)
    except JournalError as exc:
        raise ConfigError(str(path), "<file>", "a last good calibration written by "
                          "'autotune calibrate'", str(exc)) from exc
    if not isinstance(data, dict) or not isinstance(data.get("setpoints"), dict) or not isinstance(
            data.get("inversion"), int | float) or isinstance(data.get("inversion"), bool):
        raise ConfigError(str(path), "setpoints/inversion", "a last good calibration", data)
    # JSON readers take NaN and Infinity: a store must hold what a calibration can measure.
    if not -2.0 <= data["inversion"] <= 2.0:
        raise ConfigError(str(path), "inversion", "a measured inversion from -2 to 2 (a "
                          "difference of two probabilities, at most 1 in size, noise aside)",
                          data["inversion"])
    for name, value in data["setpoints"].items():
        if isinstance(value, bool) or not isinstance(value, int | float) or \
                not math.isfinite(value):
            raise ConfigError(str(path), f"setpoints.{name}", "a finite number", value)
    return data


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
            ) -> dict[str, Limit]:
    source = config.source
    limits: dict[str, Limit] = {}
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
        limit = Limit(min=max(sp.limit_min, described.min), max=min(sp.limit_max, described.max),
                      max_step=min(sp.max_step, described.max_step))
        if limit.min >= limit.max:
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
    per_point = 2 * config.measurement.ramsey_phases * config.measurement.shots_per_phase
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
        if 2 * phases * per_phase > budget:
            problems.append(ConfigError(source, key, f"room for one lock step of "
                                        f"{2 * phases * per_phase} shots (2 fields x {phases} "
                                        f"phases x lock.lock_shots_per_phase {per_phase})", budget))
    rate = float(description.repetition_rate_hz)
    least_check_s = 2 * phases * track.min_shots_per_phase / rate
    affordable = 0.5 * track.budget_fraction * track.max_interval_s
    if least_check_s > affordable:
        problems.append(ConfigError(
            source, "track.min_shots_per_phase",
            f"checks that fit half of track.budget_fraction ({track.budget_fraction:g}) at "
            f"track.max_interval_s ({track.max_interval_s:g} s): at most "
            f"{int(affordable * rate / (2 * phases))} shots per phase at {rate:g} shots/s",
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


# -- the two steps -------------------------------------------------------------------------

@dataclass
class Prepared:
    """A stage checked and ready to run (nothing written yet).

    Attributes
    ----------
    command : str
        ``"calibrate"`` or ``"retune"``.
    config : RunConfig
    description : Description
        The rig's describe reply.
    run_dir : Path
    resume : bool
    store : Path
        Where the last good calibration is written.
    last_good : dict or None
        The last good calibration a retune starts from.
    changes : list of (key, old, new)
        Configuration changes a resume accepted.
    """

    command: str
    config: RunConfig
    description: Any
    run_dir: Path
    resume: bool
    store: Path
    last_good: dict[str, Any] | None = None
    changes: list[tuple[str, Any, Any]] = field(default_factory=list)


def prepare(command: str, rig: Rig, config: RunConfig, run_dir: Path, *, resume: bool = False,
            store: Path | None = None, stop: threading.Event | None = None) -> Prepared:
    """Check a stage before anything moves or is written; see the module notes.

    The rig's ``describe`` goes through the run's one recovery path
    (:func:`autotune.run.loop.call_with_recovery`: the same retries as every later call);
    ``stop`` ends its waits.

    Raises
    ------
    ConfigErrors
        Every configuration problem found, together (exit code 2 in the CLI).
    ConfigError
        The last good calibration of a retune is missing or damaged.
    JournalError
        A new run's folder already holds a run, or a resumed one cannot be resumed (no
        journal, a damaged record, another command or rig, or the run already ended).
    RigError
        The rig does not answer its ``describe`` past the retries.
    Interrupted
        ``stop`` was set while waiting for the rig.
    """
    if command not in STAGE_COMMANDS:
        raise ValueError(f"command: expected one of {STAGE_COMMANDS}, got {command!r}")
    run_dir = Path(run_dir)
    store = Path(store) if store is not None else config.calibration_store
    last_good = read_last_good(store) if command == "retune" else None
    if not resume and (run_dir / JOURNAL_NAME).exists():
        raise JournalError(f"{run_dir} already holds a run; use --resume or another --out")
    if resume:  # every file is read (and a damaged one refused) before the rig is asked
        manifest, records = read_run_files(run_dir)
    description = opening_call("describe", rig.describe, config, rig, stop)
    problems = preflight(command, config, description, store=store, last_good=last_good,
                         resume=resume)
    changes: list[tuple[str, Any, Any]] = []
    if resume:
        if manifest.get("command") != command:
            raise JournalError(f"{run_dir} holds a {manifest.get('command')} run, not {command}; "
                               f"resume it with 'autotune {manifest.get('command')} --config "
                               f"CONFIG --resume {run_dir}'")
        started_on = manifest.get("rig", {}).get("rig")
        if started_on != description.rig:
            raise JournalError(f"{run_dir} was run on rig {started_on!r}, this is "
                               f"{description.rig!r}")
        if (ended := ended_error(run_dir, records)) is not None:
            raise ended
        changes, refused = resume_changes(manifest.get("config", {}), config.raw, config.source)
        problems.extend(refused)
    if problems:
        raise ConfigErrors(problems)
    return Prepared(command, config, description, run_dir, resume, store, last_good, changes)


def read_run_files(run_dir: Path) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """The manifest and the journal records of a run folder to resume, read (and a damaged or
    missing one refused, :class:`JournalError`) before the rig is asked anything."""
    never_started(run_dir)
    manifest = read_json(run_dir / MANIFEST_NAME)
    records = read_journal(run_dir / JOURNAL_NAME)
    if not isinstance(manifest, dict) or not isinstance(manifest.get("rig", {}), dict):
        raise JournalError(f"{run_dir / MANIFEST_NAME}: expected the JSON object of a run's "
                           f"manifest, got {type(manifest).__name__}")
    return manifest, records


def run_manifest(prepared: Prepared, extra: Mapping[str, Any]) -> dict[str, Any]:
    config = prepared.config
    return {
        "run_id": uuid.uuid4().hex,
        "command": prepared.command,
        "started": utc_now(),
        "config_file": config.source,
        "config": dict(config.raw),
        "seed": config.search.seed,
        "versions": _versions(),
        "rig": describe_to_dict(prepared.description),
        **extra,
    }


def _result(outcome: StageOutcome, command: str, run_dir: Path, clock_start: float,
            clock_end: float, wall_s: float) -> dict[str, Any]:
    est = outcome.estimate
    result = {
        "command": command,
        "status": outcome.status,
        "accepted": outcome.accepted,
        "setpoints": outcome.setpoints,
        "inversion": est.inversion,
        "inversion_interval": [est.inversion_low, est.inversion_high],
        "inversion_stderr": est.inversion_stderr,
        "confidence": est.confidence,
        "phase_shift_rad": est.phase_shift,
        "phase_shift_stderr_rad": est.phase_shift_stderr,
        "absorption": est.absorption,
        "absorption_interval": [est.absorption_low, est.absorption_high],
        "contrast": {"empty": est.contrast_empty, "one_photon": est.contrast_one_photon},
        "points": outcome.points,
        "shots": outcome.shots,
        "rig_time_s": outcome.rig_time_s,
        "rig_clock_elapsed_s": clock_end - clock_start,
        "wall_time_s": wall_s,
        "stop_reason": outcome.stop_reason,
        "drift_rate_hz_per_s": outcome.drift_rate_hz_per_s,
        # The stage's own bound on how far below the best its choice is (None: the strategy
        # states none), and the one line that says why it was or was not accepted.
        "predicted_shortfall": outcome.predicted_shortfall,
        "reason": outcome.reason,
        "run_dir": str(run_dir),
        "estimate": est.to_dict(),
    }
    if outcome.check is not None:
        result["check"] = outcome.check.to_dict()
    return result


def _guided_args(prepared: Prepared, session: Session,
                 observer: Callable[..., None] | None) -> dict[str, Any]:
    config = prepared.config
    s = config.search
    if prepared.command == "calibrate":
        box = {sp.name: (sp.search_min, sp.search_max) for sp in config.setpoints}
        nominal = {"velocity": config.nominal.two_pi_velocity, "detuning": 0.0}
        start = {name: min(max(nominal.get(name, (lo + hi) / 2), lo), hi)
                 for name, (lo, hi) in box.items()}
        return {"stage": "calibrate", "box": box, "start": start,
                "budget": Budget(s.max_points, s.max_shots, s.max_rig_time_s, s.min_points),
                "observer": observer}
    assert prepared.last_good is not None
    centre = {sp.name: float(prepared.last_good["setpoints"][sp.name]) for sp in config.setpoints}
    r = config.retune
    return {"stage": "retune", "box": retune_box(config, centre, session.limits),
            "start": centre, "prior": prepared.last_good.get("lock_prior"),
            "budget": Budget(r.max_points, r.max_shots, s.max_rig_time_s, 1),
            "check_shots_per_phase": r.check_shots_per_phase,
            "verification_shots_per_phase": r.check_shots_per_phase,
            "observer": observer}


def _stage_args(prepared: Prepared, session: Session,
                observer: Callable[..., None] | None) -> dict[str, Any]:
    config = prepared.config
    if prepared.command == "calibrate":
        nominal = {"velocity": config.nominal.two_pi_velocity, "detuning": 0.0}
        box = {sp.name: (sp.search_min, sp.search_max) for sp in config.setpoints}
        first = {name: min(max(nominal.get(name, (lo + hi) / 2), lo), hi)
                 for name, (lo, hi) in box.items()}
        s = config.search
        return {
            "stage": "calibrate", "box": box,
            "budget": Budget(s.max_points, s.max_shots, s.max_rig_time_s, s.min_points),
            "n_initial_points": s.n_initial_points, "initial_points": [first],
            "observer": observer, "refine": True,
        }
    assert prepared.last_good is not None
    centre = {sp.name: float(prepared.last_good["setpoints"][sp.name]) for sp in config.setpoints}
    r = config.retune
    return {
        "stage": "retune", "box": retune_box(config, centre, session.limits),
        "budget": Budget(r.max_points, r.max_shots, config.search.max_rig_time_s,
                         min(config.search.min_points, r.max_points)),
        "n_initial_points": r.n_initial_points, "initial_points": [centre],
        "check_at": centre,
        "still_good_above": r.still_good_fraction * float(prepared.last_good["inversion"]),
        "verification_shots_per_phase": r.check_shots_per_phase,
        "observer": observer,
    }


def _carried_prior(outcome: StageOutcome, prepared: Prepared) -> dict[str, Any] | None:
    """The lock prior to store: this stage's, or the one it started from (a retune that only
    corrected the detuning learned no new slope)."""
    if outcome.lock_prior is not None:
        return outcome.lock_prior
    if prepared.last_good is not None:
        return prepared.last_good.get("lock_prior")
    return None


def execute(prepared: Prepared, rig: Rig, *, stop: threading.Event | None = None,
            extra: Mapping[str, Any] | None = None,
            observer: Callable[..., None] | None = None,
            progress: ProgressObserver | None = None) -> dict[str, Any]:
    """Run a prepared stage: open the run folder, run, write the result and the last good.

    ``progress`` is a progress observer (:mod:`autotune.progress`): told where the stage
    stands after every acquisition and estimate, for a display; never journaled.

    On a stop signal or any error after the folder exists the rig is sent to its safe
    set-points (the outcome is on the raised :class:`Interrupted` as ``safe``), the journal gets
    an ``end`` record and is closed; the run can be resumed.

    Raises
    ------
    Interrupted
        SIGINT/SIGTERM (``safe`` says whether the rig confirmed its safe set-points).
    JournalError
        The run folder or the last good store could not be written; a run whose only failure is
        the store ends ``store_failed`` with the rig left at its verified set-points.
    RigError, LimitError
        The rig failed past the retries, or a set-point was refused.
    """
    command, config, run_dir = prepared.command, prepared.config, prepared.run_dir
    wall_start = time.monotonic()
    extra = dict(extra or {})
    if command == "retune":
        extra = {"last_good": prepared.last_good, **extra}
    opening_clock = None
    if prepared.resume:
        journal, _, records = Journal.open_for_resume(run_dir)
    else:
        # The rig's clock before the folder exists: a run that never reached the rig leaves
        # no journal behind.
        opening_clock = float(opening_call("status", rig.status, config, rig, stop).clock)
        journal, records = Journal.create(run_dir, run_manifest(prepared, extra)), []
    log = _log.bind(run=run_dir.name, command=command)
    status = "failed"
    try:
        session = Session(rig, config, journal, prepared.description, stop=stop,
                          progress=progress)
        if prepared.changes:
            session.decide("config_changed", "resumed with a changed configuration: "
                           + "; ".join(f"{k}: {old!r} -> {new!r}"
                                       for k, old, new in prepared.changes),
                           changes=[{"key": k, "old": old, "new": new}
                                    for k, old, new in prepared.changes])
        starts = [r for r in records if r.get("type") == "start"]
        if starts:
            clock_start = float(starts[0]["clock"])
        else:
            clock_start = opening_clock if opening_clock is not None else \
                float(session._call("status", lambda _id: rig.status()).clock)
            journal.append("start", clock=clock_start, command=command,
                           instance=getattr(prepared.description, "instance", None))
    except BaseException:
        journal.append("end", status=status)
        journal.close()
        raise
    try:
        session.resume_moves(records)
        session.learn_present()
        if config.search.strategy == "phase_lock":
            outcome = run_guided_stage(session, records=records,
                                       **_guided_args(prepared, session, observer))
        else:
            outcome = run_stage(session, records=records,
                                **_stage_args(prepared, session, observer))
        clock_end = session.clock
        result = _result(outcome, command, run_dir, clock_start, clock_end,
                         time.monotonic() - wall_start)
        if outcome.accepted and outcome.status != "still_good":
            try:
                write_json_atomic(prepared.store, {
                    "setpoints": outcome.setpoints, "inversion": outcome.estimate.inversion,
                    "inversion_low": outcome.estimate.inversion_low,
                    "inversion_high": outcome.estimate.inversion_high,
                    "run_dir": str(run_dir), "t_wall": utc_now(),
                    "rig": prepared.description.rig,
                    # What the phase lock learned (slope, phase at the peak, absorption
                    # minimum): the next retune reads the detuning error from one check.
                    "lock_prior": _carried_prior(outcome, prepared),
                })
            except JournalError as exc:
                # The calibration itself is good and the rig stays at it: keep the result,
                # say what failed, and let a resume with a corrected store finish the job.
                result["store_error"] = str(exc)
                write_json_atomic(run_dir / RESULT_NAME, result)
                session.decide("store_failed", f"{exc}; the result is in {RESULT_NAME} and the "
                               f"rig stays at the verified set-points")
                status = "store_failed"
                raise
            session.decide("store", f"new last good calibration written to "
                           f"{Path(prepared.store).resolve()}")
        elif not outcome.accepted:
            if config.on_reject == "safe":
                ok, detail = session.go_safe(f"{command} not accepted", expected=True)
                result["left_at"] = "safe" if ok else f"safe set-points NOT confirmed: {detail}"
            else:
                result["left_at"] = "verified"
            session.decide("not_stored", f"the last good calibration is untouched; the rig is "
                           f"left at its {'safe' if config.on_reject == 'safe' else 'verified'} "
                           f"set-points ([acceptance] on_reject)")
        write_json_atomic(run_dir / RESULT_NAME, result)
        status = outcome.status
        return result
    except Interrupted as exc:
        status = "interrupted"
        exc.safe, exc.safe_detail = session.go_safe("stopped by signal")
        raise
    except Exception as exc:
        status = settle_failure(session, exc, status)
        raise
    finally:
        journal.append("end", status=status)
        journal.close()
        log.info("run_end", status=status)


def _run(command: str, rig: Rig, config: RunConfig, run_dir: Path, *, resume: bool,
         stop: threading.Event | None, store: Path | None, extra: Mapping[str, Any] | None,
         observer: Callable[..., None] | None, progress: ProgressObserver | None
         ) -> dict[str, Any]:
    prepared = prepare(command, rig, config, run_dir, resume=resume, store=store, stop=stop)
    return execute(prepared, rig, stop=stop, extra=extra, observer=observer, progress=progress)


def calibrate(rig: Rig, config: RunConfig, run_dir: Path, *, resume: bool = False,
              stop: threading.Event | None = None, store: Path | None = None,
              extra: Mapping[str, Any] | None = None,
              observer: Callable[..., None] | None = None,
              progress: ProgressObserver | None = None) -> dict[str, Any]:
    """Full calibration over the configured box; returns (and writes) the result.

    Parameters
    ----------
    rig : Rig
        A connected rig.
    config : RunConfig
        The checked configuration.
    run_dir : Path
        The run folder (new, or an interrupted one with ``resume=True``).
    resume : bool
        Continue the run in ``run_dir`` from its journal.
    stop : threading.Event, optional
        Set by a signal handler to stop cleanly.
    store : Path, optional
        Where to write the last good calibration (default: the configured store).
    extra : Mapping, optional
        More manifest entries (the dry run records its scenario here).
    observer : callable, optional
        Passed to :func:`autotune.run.loop.run_stage` (benchmark studies).
    progress : callable, optional
        A progress observer (:mod:`autotune.progress`), for a display; never journaled.
    """
    return _run("calibrate", rig, config, run_dir, resume=resume, stop=stop, store=store,
                extra=extra, observer=observer, progress=progress)


def retune(rig: Rig, config: RunConfig, run_dir: Path, *, resume: bool = False,
           stop: threading.Event | None = None, store: Path | None = None,
           extra: Mapping[str, Any] | None = None,
           observer: Callable[..., None] | None = None,
           progress: ProgressObserver | None = None) -> dict[str, Any]:
    """Check the last good set-points; search a narrowed box only if they no longer hold.

    Parameters are those of :func:`calibrate`; ``store`` is read first and replaced only by an
    accepted new setting.
    """
    return _run("retune", rig, config, run_dir, resume=resume, stop=stop, store=store,
                extra=extra, observer=observer, progress=progress)


def unfinished(records: Sequence[Mapping[str, Any]]) -> bool:
    """True when a journal's records show a run that did not end, or ended resumably."""
    return not records or records[-1].get("type") != "end" or \
        records[-1].get("status") in RESUMABLE
