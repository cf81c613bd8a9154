"""One stage as a run: checks before the first move, run folder, manifest, result, last good.

This is the imperative shell around :func:`autotune.run.stage.run_stage`. A stage runs in two steps:

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
import platform
import threading
import time
import uuid
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any

import structlog

from autotune import __version__
from autotune.config import RunConfig
from autotune.errors import ConfigError, ConfigErrors, Interrupted, JournalError, ValueRefused
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
from autotune.run.guard import Budget, retune_box
from autotune.run.guided_stage import run_guided_stage
from autotune.run.session import Session
from autotune.run.stage import StageOutcome, run_stage
from autotune.progress import ProgressObserver
from autotune.run.records import End, Start, of_type, parse, parse_all
from autotune.wire.rig import Rig
from autotune.run.preflight import (never_started, opening_call, preflight, resume_changes,
                                    settle_failure, track_preflight)

__all__ = ["calibrate", "retune", "prepare", "execute", "Prepared", "read_last_good",
           "describe_to_dict", "preflight", "track_preflight", "resume_changes",
           "STAGE_COMMANDS", "opening_call", "read_run_files", "decide_config_changes",
           "run_manifest", "open_run_folder", "start_session"]

_log = structlog.get_logger(__name__)

#: The commands that run one stage.
STAGE_COMMANDS = ("calibrate", "retune")


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
    (:func:`autotune.run.session.call_with_recovery`: the same retries as every later call);
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
        raise ValueRefused(f"command: expected one of {STAGE_COMMANDS}, got {command!r}")
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


def run_manifest(command: str, config: RunConfig, description: Any,
                 extra: Mapping[str, Any]) -> dict[str, Any]:
    """A new run's ``manifest.json``: its id, command, start, configuration (file and every
    key), seed, the versions of the software, the rig's describe reply, then ``extra``.

    Parameters
    ----------
    command : str
        The command that runs (``calibrate``, ``retune``, ``track``).
    config : RunConfig
        The checked configuration.
    description : Description
        The rig's describe reply.
    extra : Mapping
        More entries (the last good calibration a retune or a night starts from, a dry run's
        scenario).
    """
    return {
        "run_id": uuid.uuid4().hex,
        "command": command,
        "started": utc_now(),
        "config_file": config.source,
        "config": dict(config.raw),
        "seed": config.search.seed,
        "versions": _versions(),
        "rig": describe_to_dict(description),
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


def _calibration_box_and_start(config: RunConfig
                               ) -> tuple[dict[str, tuple[float, float]], dict[str, float]]:
    """A calibration's search box (each set-point's search range) and its first point: the
    nominal 2 pi velocity and zero detuning, clipped into the box (a set-point without a
    nominal value starts at the middle of its range)."""
    box = {sp.name: (sp.search_min, sp.search_max) for sp in config.setpoints}
    nominal = {"velocity": config.nominal.two_pi_velocity, "detuning": 0.0}
    start = {name: min(max(nominal.get(name, (lo + hi) / 2), lo), hi)
             for name, (lo, hi) in box.items()}
    return box, start


def _retune_centre(prepared: Prepared) -> dict[str, float]:
    """A retune's centre and first point: the last good calibration's set-points."""
    assert prepared.last_good is not None
    return {sp.name: float(prepared.last_good["setpoints"][sp.name])
            for sp in prepared.config.setpoints}


def _guided_args(prepared: Prepared, session: Session,
                 observer: Callable[..., None] | None) -> dict[str, Any]:
    config = prepared.config
    s = config.search
    if prepared.command == "calibrate":
        box, start = _calibration_box_and_start(config)
        return {"stage": "calibrate", "box": box, "start": start,
                "budget": Budget(s.max_points, s.max_shots, s.max_rig_time_s, s.min_points),
                "observer": observer}
    centre = _retune_centre(prepared)
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
        box, first = _calibration_box_and_start(config)
        s = config.search
        return {
            "stage": "calibrate", "box": box,
            "budget": Budget(s.max_points, s.max_shots, s.max_rig_time_s, s.min_points),
            "n_initial_points": s.n_initial_points, "initial_points": [first],
            "observer": observer, "refine": True,
        }
    centre = _retune_centre(prepared)
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
    command, run_dir = prepared.command, prepared.run_dir
    wall_start = time.monotonic()
    extra = dict(extra or {})
    if command == "retune":
        extra = {"last_good": prepared.last_good, **extra}
    journal, records, opening_clock = open_run_folder(
        command, prepared.config, prepared.description, run_dir, resume=prepared.resume,
        rig=rig, stop=stop, extra=extra)
    session, clock_start = start_session(
        rig, prepared.config, journal, prepared.description, command=command,
        changes=prepared.changes, records=records, opening_clock=opening_clock, stop=stop,
        progress=progress)
    log = _log.bind(run=run_dir.name, command=command)
    status = "failed"
    try:
        outcome = _run_stage(prepared, session, records, observer)
        session.finish_progress()
        result = _result(outcome, command, run_dir, clock_start, session.clock,
                         time.monotonic() - wall_start)
        if outcome.accepted and outcome.status != "still_good":
            try:
                _store_last_good(prepared, outcome)
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
            result["left_at"] = _leave_rejected(prepared, session)
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


def open_run_folder(command: str, config: RunConfig, description: Any, run_dir: Path, *,
                    resume: bool, rig: Rig, stop: threading.Event | None = None,
                    extra: Mapping[str, Any] | None = None
                    ) -> tuple[Journal, list[dict[str, Any]], float | None]:
    """Create a run's folder with its manifest, or reopen it for a resume (a stage's and a
    night's alike).

    A new folder is made only after the rig has told its clock (through the run's one
    recovery path, ``stop`` ending its waits): a run that never reached the rig leaves no
    journal behind.

    Parameters
    ----------
    command, config, description
        The run's command, checked configuration and the rig's describe reply (into the
        manifest, :func:`run_manifest`).
    run_dir : Path
        The run folder.
    resume : bool
        Reopen the folder's journal instead of creating it.
    rig : Rig
        Asked for its ``status`` before a new folder is made.
    stop : threading.Event, optional
        A stop signal ending the waits of that call.
    extra : Mapping, optional
        More manifest entries (see :func:`run_manifest`).

    Returns
    -------
    journal : Journal
        The run's journal, open for appending.
    records : list of dict
        The records of an earlier attempt (empty for a new run).
    opening_clock : float or None
        The rig's clock before a new folder was made (s); None on a resume.

    Raises
    ------
    JournalError
        The folder cannot be created or its journal reopened.
    RigError, Interrupted
        The rig did not tell its clock past the retries, or ``stop`` was set meanwhile.
    """
    if resume:
        journal, _, records = Journal.open_for_resume(run_dir)
        return journal, records, None
    opening_clock = float(opening_call("status", rig.status, config, rig, stop).clock)
    manifest = run_manifest(command, config, description, dict(extra or {}))
    return Journal.create(run_dir, manifest), [], opening_clock


def decide_config_changes(session: Session, changes: Sequence[tuple[str, Any, Any]]) -> None:
    """Journal the configuration changes a resume accepted (a ``config_changed`` decision), if
    any.

    Parameters
    ----------
    session : Session
        The resumed run's session.
    changes : sequence of (key, old, new)
        The changes :func:`autotune.run.preflight.resume_changes` allowed.
    """
    if changes:
        session.decide("config_changed", "resumed with a changed configuration: "
                       + "; ".join(f"{k}: {old!r} -> {new!r}" for k, old, new in changes),
                       changes=[{"key": k, "old": old, "new": new} for k, old, new in changes])


def start_session(rig: Rig, config: RunConfig, journal: Journal, description: Any, *,
                  command: str, changes: Sequence[tuple[str, Any, Any]],
                  records: Sequence[Mapping[str, Any]], opening_clock: float | None,
                  stop: threading.Event | None = None,
                  progress: ProgressObserver | None = None) -> tuple[Session, float]:
    """The run's session, with a resume's configuration changes and the run's ``start`` record
    (once, with the rig's clock and instance) journaled: a stage's and a night's alike.

    If anything here fails, the journal gets an ``end`` record (``failed``) and is closed
    before the error is raised.

    Parameters
    ----------
    rig, config, journal, description
        The rig, the checked configuration, the run's journal (or what wraps it) and the rig's
        describe reply, for the :class:`~autotune.run.session.Session`.
    command : str
        The command that runs.
    changes : sequence of (key, old, new)
        The configuration changes a resume accepted (:func:`decide_config_changes`).
    records : sequence of journal records
        The records of an earlier attempt: a ``start`` with its clock there is not written
        again.
    opening_clock : float or None
        The rig's clock read before a new folder was made (s, :func:`open_run_folder`); None:
        asked now.
    stop, progress
        The session's stop signal and progress observer.

    Returns
    -------
    session : Session
    clock_start : float
        The rig's clock at the start of the run (s): the first attempt's on a resume.
    """
    try:
        session = Session(rig, config, journal, description, stop=stop, progress=progress)
        decide_config_changes(session, changes)
        starts = of_type(parse_all(records), Start)
        if starts and starts[0].clock is not None:
            return session, starts[0].clock
        clock_start = opening_clock if opening_clock is not None else session.read_clock()
        journal.append("start", clock=clock_start, command=command,
                       instance=getattr(description, "instance", None))
        return session, clock_start
    except BaseException:
        journal.append("end", status="failed")
        journal.close()
        raise


def _run_stage(prepared: Prepared, session: Session, records: Sequence[Mapping[str, Any]],
               observer: Callable[..., None] | None) -> StageOutcome:
    """Replay the earlier attempt's moves, then run the configured strategy's stage."""
    session.resume_moves(records)
    session.learn_present()
    if prepared.config.search.strategy == "phase_lock":
        return run_guided_stage(session, records=records,
                                **_guided_args(prepared, session, observer))
    return run_stage(session, records=records, **_stage_args(prepared, session, observer))


def _store_last_good(prepared: Prepared, outcome: StageOutcome) -> None:
    """Replace the last good calibration with an accepted stage's choice (atomically)."""
    write_json_atomic(prepared.store, {
        "setpoints": outcome.setpoints, "inversion": outcome.estimate.inversion,
        "inversion_low": outcome.estimate.inversion_low,
        "inversion_high": outcome.estimate.inversion_high,
        "run_dir": str(prepared.run_dir), "t_wall": utc_now(),
        "rig": prepared.description.rig,
        # What the phase lock learned (slope, phase at the peak, absorption
        # minimum): the next retune reads the detuning error from one check.
        "lock_prior": _carried_prior(outcome, prepared),
    })


def _leave_rejected(prepared: Prepared, session: Session) -> str:
    """Leave the rig as ``[acceptance] on_reject`` says after a stage not accepted; where it
    was left (the result's ``left_at``)."""
    on_reject = prepared.config.on_reject
    if on_reject == "safe":
        ok, detail = session.go_safe(f"{prepared.command} not accepted", expected=True)
        left_at = "safe" if ok else f"safe set-points NOT confirmed: {detail}"
    else:
        left_at = "verified"
    session.decide("not_stored", f"the last good calibration is untouched; the rig is "
                   f"left at its {'safe' if on_reject == 'safe' else 'verified'} "
                   f"set-points ([acceptance] on_reject)")
    return left_at


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
        Passed to :func:`autotune.run.stage.run_stage` (benchmark studies).
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
    if not records:
        return True
    last = parse(records[-1])
    return not isinstance(last, End) or last.status in RESUMABLE
