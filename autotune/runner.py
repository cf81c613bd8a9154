"""One stage as a run: run folder, manifest, journal, result file, last good calibration.

This is the imperative shell around :func:`autotune.loop.run_stage`. The CLI (and the dry run)
call :func:`calibrate` and :func:`retune` with a connected rig; both write everything they do to
the run folder and return the result that they also wrote to ``result.json``.

The last good calibration (``[calibration] store``) is a small JSON file::

    {"setpoints": {...}, "inversion": float, "inversion_low": float, "inversion_high": float,
     "run_dir": str, "t_wall": str, "rig": str}

It is replaced (atomically) only by an accepted calibration or retune.
"""

from __future__ import annotations

import platform
import threading
import time
import uuid
from collections.abc import Callable, Mapping
from dataclasses import asdict
from importlib import metadata
from pathlib import Path
from typing import Any

import structlog

from autotune import __version__
from autotune.config import RunConfig
from autotune.errors import AutotuneError, ConfigError, Interrupted, JournalError
from autotune.journal import RESULT_NAME, Journal, read_json, utc_now, write_json_atomic
from autotune.loop import Budget, Session, StageOutcome, retune_box, run_stage
from autotune.rig import Rig

__all__ = ["calibrate", "retune", "read_last_good", "describe_to_dict"]

_log = structlog.get_logger(__name__)


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
            data.get("inversion"), int | float):
        raise ConfigError(str(path), "setpoints/inversion", "a last good calibration", data)
    return data


def _start(run_dir: Path, command: str, config: RunConfig, rig: Rig, resume: bool,
           extra: Mapping[str, Any]) -> tuple[Journal, list[dict[str, Any]], Any]:
    description = rig.describe()
    if resume:
        journal, manifest, records = Journal.open_for_resume(run_dir)
        if manifest.get("command") != command:
            journal.close()
            raise JournalError(f"{run_dir} holds a {manifest.get('command')} run, not {command}")
        if manifest.get("rig", {}).get("rig") != description.rig:
            journal.close()
            raise JournalError(f"{run_dir} was run on rig {manifest.get('rig', {}).get('rig')!r}, "
                               f"this is {description.rig!r}")
        return journal, records, description
    manifest = {
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
    return Journal.create(run_dir, manifest), [], description


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
        "run_dir": str(run_dir),
        "estimate": est.to_dict(),
    }
    if outcome.check is not None:
        result["check"] = outcome.check.to_dict()
    return result


def _execute(command: str, rig: Rig, config: RunConfig, run_dir: Path, *, resume: bool,
             stop: threading.Event | None, store: Path, stage_args: Any,
             extra: Mapping[str, Any] | None = None) -> dict[str, Any]:
    wall_start = time.monotonic()
    journal, records, description = _start(run_dir, command, config, rig, resume, extra or {})
    log = _log.bind(run=run_dir.name, command=command)
    status = "failed"
    try:
        session = Session(rig, config, journal, description, stop=stop)
        clock_start = float(records[0]["clock"]) if records and "clock" in records[0] else \
            rig.status().clock
        if not records:
            journal.append("start", clock=clock_start, command=command)
    except BaseException:
        journal.append("end", status=status)
        journal.close()
        raise
    try:
        session.learn_present()
        outcome = run_stage(session, records=records, **stage_args(session))
        clock_end = rig.status().clock
        result = _result(outcome, command, run_dir, clock_start, clock_end,
                         time.monotonic() - wall_start)
        write_json_atomic(run_dir / RESULT_NAME, result)
        if outcome.accepted and outcome.status != "still_good":
            write_json_atomic(store, {
                "setpoints": outcome.setpoints, "inversion": outcome.estimate.inversion,
                "inversion_low": outcome.estimate.inversion_low,
                "inversion_high": outcome.estimate.inversion_high,
                "run_dir": str(run_dir), "t_wall": utc_now(), "rig": description.rig,
            })
            session.decide("store", f"new last good calibration written to {store}")
        status = outcome.status
        return result
    except Interrupted:
        status = "interrupted"
        session.go_safe("stopped by signal")
        raise
    except AutotuneError as exc:
        status = "aborted"
        session.decide("abort", str(exc))
        session.go_safe(f"aborted: {exc}")
        raise
    finally:
        journal.append("end", status=status)
        journal.close()
        log.info("run_end", status=status)


def calibrate(rig: Rig, config: RunConfig, run_dir: Path, *, resume: bool = False,
              stop: threading.Event | None = None, store: Path | None = None,
              extra: Mapping[str, Any] | None = None,
              observer: Callable[..., None] | None = None) -> dict[str, Any]:
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
        Passed to :func:`autotune.loop.run_stage` (benchmark studies).
    """
    def stage_args(session: Session) -> dict[str, Any]:
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

    return _execute("calibrate", rig, config, run_dir, resume=resume, stop=stop,
                    store=store or config.calibration_store, stage_args=stage_args, extra=extra)


def retune(rig: Rig, config: RunConfig, run_dir: Path, *, resume: bool = False,
           stop: threading.Event | None = None, store: Path | None = None,
           extra: Mapping[str, Any] | None = None,
           observer: Callable[..., None] | None = None) -> dict[str, Any]:
    """Check the last good set-points; search a narrowed box only if they no longer hold.

    Parameters are those of :func:`calibrate`; ``store`` is read first and replaced only by an
    accepted new setting.
    """
    store = store or config.calibration_store
    last_good = read_last_good(store)
    names = [sp.name for sp in config.setpoints]
    missing = [n for n in names if n not in last_good["setpoints"]]
    if missing:
        raise ConfigError(str(store), "setpoints", "values for " + ", ".join(names), missing)
    centre = {n: float(last_good["setpoints"][n]) for n in names}

    def stage_args(session: Session) -> dict[str, Any]:
        r = config.retune
        return {
            "stage": "retune", "box": retune_box(config, centre, session.limits),
            "budget": Budget(r.max_points, r.max_shots, config.search.max_rig_time_s,
                             min(config.search.min_points, r.max_points)),
            "n_initial_points": r.n_initial_points, "initial_points": [centre],
            "check_at": centre,
            "still_good_above": r.still_good_fraction * float(last_good["inversion"]),
            "verification_shots_per_phase": r.check_shots_per_phase,
            "observer": observer,
        }

    return _execute("retune", rig, config, run_dir, resume=resume, stop=stop, store=store,
                    stage_args=stage_args, extra={"last_good": last_good, **(extra or {})})
