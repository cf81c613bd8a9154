"""``autotune track``: hold the 2π condition through the night, in one run folder.

The imperative shell around :mod:`autotune.analysis.hold` (the lock, the sequential test and the plan of
the checks, all pure) and :func:`autotune.run.guided_stage.run_guided_stage` (the guided retune and
calibration, unchanged).

A night
-------
1. It begins with the guided retune from the last good calibration (a check of its set-points
   against the stored lock, corrected when needed), or with a calibration when the store holds
   none with a lock prior. The stage's verified set-points, its lock prior (slope, cubic, phase
   at the peak) and its verified inversion are what the night holds.
2. It plans the checks (:func:`autotune.analysis.hold.plan_checks`, a ``plan`` decision with its
   numbers) and holds: wait (the rig clock is the reference: a simulated rig's virtual clock is
   moved on with its ``advance`` op, a real rig is waited for in wall time, interruptibly, its
   clock read with ``status``), check (one fringe pair of both fields at the set-points in force
   and the plan's shots), assess (:func:`autotune.analysis.hold.assess_check`), correct the detuning.
   The plan is made again after every stage and every hour of rig time (the hourly plan after
   a recheck run ends), from the noise and
   signal measured so far and the beam time holding has taken.
   The beam budget is a ceiling (:class:`autotune.analysis.hold.BeamBudget`): a check or a stage begins
   only when what is left pays for it at its largest size; a recovery is sized by
   :func:`autotune.analysis.hold.choose_recovery` (a ``budget`` decision when it had to be smaller, or a
   correction without a stage, or none); when no check can be paid for, the night holds its
   set-points without checks (an ``unwatched`` decision). The rig time the budget left unheld
   is counted (:class:`autotune.analysis.hold.Unheld`) and in the result.
3. An alarm of the sequential test begins a recovery: the guided retune, started where the lock
   estimates the peak went; if it is not accepted, a calibration. A recovery accepted with a lock
   prior resets the lock and the test at its verified set-points, becomes the last good
   calibration (``[calibration] store``) and the plan is made again. A retune not accepted whose
   verified inversion is not significantly below the night's reference
   (:func:`autotune.analysis.hold.holds_as_well`) is held in place of the calibration (an
   ``adopt`` decision; not stored as last good). Any other failed recovery counts a failure,
   and the recovery is tried again an interval later.
4. It stops at SIGINT/SIGTERM, at its end in rig or wall time (``[track] max_rig_time_s``,
   ``max_wall_time_s``, ``end_at_local_time``), or after ``max_consecutive_failures`` failed
   recoveries in a row, leaving the rig where ``[track] on_stop`` says, with the journal closed
   and resumable.

The journal
-----------
Besides the stage records, a night writes

- ``wait``: written before waiting, with the rig clock it waits until and why;
- measurements labelled ``hold``, numbered through the night, with their write-ahead requests,
  acquisitions and estimates;
- ``hold`` after each check's estimate: every number of the assessment (phase error, offset
  from the peak, innovation, the statistics, the lock), the action with its reason, and the
  night's whole ``state``;
- decisions ``retune`` / ``calibrate`` (a stage begins, with its index and arguments; its own
  records follow, from ``stage`` to its final decision), ``stage_done`` (its outcome), ``plan``
  (the cadence and shots of the checks with their numbers, and the ``state``), ``correct``
  (``from``/``to`` set-points, as :mod:`autotune.report` draws them), ``alarm`` (the statistic,
  its value and threshold), ``failure`` (with the ``state``), ``stop`` (the reason).

Resume
------
The last snapshot (a ``hold`` record, or a ``plan``, ``failure`` or ``unwatched`` decision)
holds the whole
state; the records after it say how far the next step went: a correction decided or moved, an
alarm decided, a stage begun or finished, a wait begun, a check measured in part. Each step is
completed without repeating what was done: a check from its missing acquisitions only (a
request whose reply never arrived is asked for again by its ``msg_id``), a stage through
:func:`autotune.run.guided_stage.run_guided_stage`'s own resume, a wait up to its recorded clock.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import structlog

from autotune.config import RunConfig
from autotune.errors import ConfigErrors, Interrupted, JournalError
from autotune.run.journal import (
    JOURNAL_NAME,
    RESULT_NAME,
    ended_error,
    write_json_atomic,
)
from autotune.progress import ProgressObserver
from autotune.wire.rig import Rig
from autotune.run.runner import (
    open_run_folder,
    opening_call,
    read_last_good,
    read_run_files,
    resume_changes,
    settle_failure,
    start_session,
    track_preflight,
)
from autotune.run.night_settings import PreparedNight, hold_settings
from autotune.run.night_ledger import NightLedger
from autotune.run.night import Night

__all__ = ["PreparedNight", "prepare_track", "execute_track", "track", "TRACK_END_STATUSES",
           "hold_settings"]

_log = structlog.get_logger(__name__)

#: End statuses of a night that finished: its end came, or its recoveries kept failing.
TRACK_END_STATUSES = ("ended", "gave_up")


def prepare_track(rig: Rig, config: RunConfig, run_dir: Path, *, resume: bool = False,
                  store: Path | None = None, stop: threading.Event | None = None
                  ) -> PreparedNight:
    """Check a night before anything moves or is written.

    Raises
    ------
    ConfigErrors
        Every problem found together (exit code 2 in the CLI), see
        :func:`autotune.run.runner.track_preflight`.
    ConfigError
        The last good store exists but is damaged.
    JournalError
        A new night's folder already holds a run, or a resumed one cannot be resumed (no
        journal, another command or rig, or the night already ended).
    RigError
        The rig does not answer its ``describe``.
    """
    run_dir = Path(run_dir)
    store = Path(store) if store is not None else config.calibration_store
    last_good = read_last_good(store) if store.exists() else None
    if not resume and (run_dir / JOURNAL_NAME).exists():
        raise JournalError(f"{run_dir} already holds a run; use --resume or another --out")
    if resume:  # every file is read (and a damaged one refused) before the rig is asked
        manifest, records = read_run_files(run_dir)
    description = opening_call("describe", rig.describe, config, rig, stop)
    problems = track_preflight(config, description, store=store, last_good=last_good,
                               resume=resume)
    changes: list[tuple[str, Any, Any]] = []
    if resume:
        if manifest.get("command") != "track":
            raise JournalError(f"{run_dir} holds a {manifest.get('command')} run, not a night of "
                               f"track; resume it with 'autotune {manifest.get('command')} "
                               f"--config CONFIG --resume {run_dir}'")
        started_on = manifest.get("rig", {}).get("rig")
        if started_on != description.rig:
            raise JournalError(f"{run_dir} was run on rig {started_on!r}, this is "
                               f"{description.rig!r}")
        if (ended := ended_error(run_dir, records, "night")) is not None:
            raise ended
        changes, refused = resume_changes(manifest.get("config", {}), config.raw, config.source,
                                          also_allowed=("track.",))
        problems.extend(refused)
    if problems:
        raise ConfigErrors(problems)
    return PreparedNight(config, description, run_dir, resume, store, last_good, changes)


def track(rig: Rig, config: RunConfig, run_dir: Path, *, resume: bool = False,
          stop: threading.Event | None = None, store: Path | None = None,
          extra: Mapping[str, Any] | None = None,
          wall: Callable[[], float] = time.time,
          progress: ProgressObserver | None = None) -> dict[str, Any]:
    """Prepare and run a night (studies and tests; the CLI calls the two steps)."""
    prepared = prepare_track(rig, config, run_dir, resume=resume, store=store, stop=stop)
    return execute_track(prepared, rig, stop=stop, extra=extra, wall=wall, progress=progress)


def execute_track(prepared: PreparedNight, rig: Rig, *, stop: threading.Event | None = None,
                  extra: Mapping[str, Any] | None = None,
                  wall: Callable[[], float] = time.time,
                  progress: ProgressObserver | None = None) -> dict[str, Any]:
    """Run a prepared night: open the run folder, hold, write the result.

    ``progress`` is a progress observer (:mod:`autotune.progress`): told a
    :class:`~autotune.progress.NightProgress` after each check and before each wait, and the
    stages' own progress during a retune or a calibration. Display only, never journaled.

    On a stop signal the rig stays at the held set-points if ``on_stop = "last_good"`` and it is
    there, else goes to its safe set-points (the outcome is on the raised :class:`Interrupted`
    as ``safe``); on an error it goes to its safe set-points. The journal gets an ``end``
    record and is closed; a stopped or aborted night can be resumed.

    Raises
    ------
    Interrupted
        SIGINT/SIGTERM.
    JournalError
        The run folder or the last good store could not be written.
    RigError, LimitError
        The rig failed past the retries, or a set-point was refused.
    """
    config, run_dir = prepared.config, prepared.run_dir
    wall_start = time.monotonic()
    journal, records, opening_clock = open_run_folder(
        "track", config, prepared.description, run_dir, resume=prepared.resume, rig=rig,
        stop=stop, extra={"last_good": prepared.last_good, **dict(extra or {})})
    ledger = NightLedger(journal, records)
    session, _ = start_session(rig, config, ledger, prepared.description,  # type: ignore[arg-type]
                               command="track", changes=prepared.changes, records=records,
                               opening_clock=opening_clock, stop=stop, progress=progress)
    log = _log.bind(run=run_dir.name, command="track")
    status = "failed"
    night: Night | None = None
    try:
        night = Night(session, prepared, rig, ledger, wall)
        session.resume_moves(records)
        session.learn_present()
        result = night.run()
        result["wall_time_s"] = time.monotonic() - wall_start
        write_json_atomic(run_dir / RESULT_NAME, result)
        status = result["status"]
        return result
    except Interrupted as exc:
        status = "interrupted"
        exc.safe, exc.safe_detail = night.leave_on_signal() if night is not None else \
            session.go_safe("stopped by signal")
        raise
    except Exception as exc:
        status = settle_failure(session, exc, status)
        raise
    finally:
        ledger.append("end", status=status)
        journal.close()
        log.info("night_end", status=status)

