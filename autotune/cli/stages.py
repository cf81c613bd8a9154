"""The commands that run stages on a rig: ``calibrate``, ``retune`` and ``track``, in a run
folder they hold, resumable."""

from __future__ import annotations

import argparse
import importlib
import logging
import shlex
import sys
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

import structlog

from autotune.config import RunConfig, load_config
from autotune.run.journal import JOURNAL_NAME, already_ended
from autotune.run.runlock import hold_run_folder
from autotune.progress import count_text, setpoints_text
from autotune.cli.common import (CAUTION, EXIT_BAD_INPUT, EXIT_BELOW_ACCEPTANCE, EXIT_OK, claim_rig,
                                 connect, default_run_dir, guarded, install_stop_handlers)
from autotune.cli.console import log_to_run_folder, progress_display

_log = structlog.get_logger("autotune.cli")


def stage_summary(result: dict[str, Any]) -> str:
    low, high = result["inversion_interval"]
    conf = round(100 * result["confidence"])
    return (f"{result['command']}: {result['status']} at {setpoints_text(result['setpoints'])}: "
            f"inversion {result['inversion']:.3f} [{low:.3f}, {high:.3f}] ({conf}% interval)\n"
            f"  phase shift {result['phase_shift_rad'] / 3.141592653589793:.3f} pi, absorption "
            f"{result['absorption']:.3f}; {result['points']} points, {result['shots']:,} shots, "
            f"rig time {result['rig_time_s'] / 60:.1f} min") + (
        f"\n{result['command']}: {result['reason']}"
        if not result["accepted"] and result.get("reason") else "")


def _exit_for_result(result: dict[str, Any]) -> int:
    return EXIT_OK if result["accepted"] else EXIT_BELOW_ACCEPTANCE


def _run_folder(ns: argparse.Namespace, command: str) -> tuple[Path, bool]:
    if ns.resume is not None:
        return Path(ns.resume), True
    return (Path(ns.out) if ns.out is not None else default_run_dir(command)), False


def _resume_command(command: str, config_path: str, run_dir: Path) -> str:
    return f"autotune {command} --config {shlex.quote(str(config_path))} --resume {shlex.quote(str(run_dir))}"


def _deferred(module: str, name: str, *bound: Any) -> Callable[..., Any]:
    """``module.name`` (with ``bound`` first arguments), imported at its first call.

    The run's modules load scipy, scikit-optimize and matplotlib (seconds on a loaded
    machine); a command imports them only after its first line (what it does, which endpoint)
    is on the terminal, so that a rig that does not answer is never met by silence.
    """
    def call(*args: Any, **kwargs: Any) -> Any:
        return getattr(importlib.import_module(module), name)(*bound, *args, **kwargs)

    return call


def cmd_stage(ns: argparse.Namespace, command: str) -> int:
    return _act_on_rig(ns, command, _deferred("autotune.run.runner", "prepare", command),
                       _deferred("autotune.run.runner", "execute"), stage_summary, _exit_for_result)


def _act_on_rig(ns: argparse.Namespace, command: str, prepare: Callable[..., Any],
                execute: Callable[..., dict[str, Any]], summary: Callable[[dict[str, Any]], str],
                exit_code: Callable[[dict[str, Any]], int]) -> int:
    """A command that acts on a rig: everything checked before the run folder exists or
    anything moves, the caution, the run with its progress and its log in the folder, the
    summary; a stop prints the exact command that resumes."""
    started: list[Path] = []

    def body() -> int:
        config = load_config(ns.config)
        run_dir, resume = _run_folder(ns, command)
        stop = install_stop_handlers(lambda: f" Continue with: {hint()}" if hint() else "")
        # One owner per run folder, from before the first request to the rig until the exit.
        with hold_run_folder(run_dir, command):
            return _act_on_rig_locked(ns, command, config, run_dir, resume, stop, prepare,
                                      execute, summary, exit_code, started)

    def hint() -> str | None:
        # A folder whose run never reached the rig has no journal: nothing to resume.
        if not started or not (started[0] / JOURNAL_NAME).exists():
            return None
        return _resume_command(command, ns.config, started[0])

    return guarded(body, hint)


def _act_on_rig_locked(ns: argparse.Namespace, command: str, config: RunConfig, run_dir: Path,
                       resume: bool, stop: threading.Event, prepare: Callable[..., Any],
                       execute: Callable[..., dict[str, Any]],
                       summary: Callable[[dict[str, Any]], str],
                       exit_code: Callable[[dict[str, Any]], int], started: list[Path]) -> int:
    """The body of :func:`_act_on_rig` once this process holds the run folder's lock."""
    # A resume of a run killed after its end record (or run twice): nothing moves; its
    # outcome is told again from the folder alone (the rig may be down), with its exit
    # status. One that ended without a result is refused by prepare (exit 2).
    ended = already_ended(run_dir, command) if resume else None
    if ended is not None and ended.result is not None:
        print(f"autotune: {ended}; nothing was sent to the rig. Its result:", file=sys.stderr)
        print(summary(ended.result))
        print(f"run folder: {run_dir}")
        return exit_code(ended.result)
    # At once: a rig that does not answer is otherwise silent for a whole timeout.
    _log.info("connect", endpoint=config.bus.endpoint, timeout_s=config.bus.timeout_s,
              retries=config.bus.retries)
    with connect(config, stop) as rig:
        # prepare only reads the rig (describe): its checks of the input come first, the
        # lease before the first move.
        prepared = prepare(rig, config, run_dir, resume=resume, stop=stop)
        claim_rig(rig, command, getattr(ns, "wait_lease_s", 0.0), config, stop)
        print(CAUTION, file=sys.stderr)
        run_dir.mkdir(parents=True, exist_ok=True)
        started.append(run_dir)
        handler = log_to_run_folder(run_dir)
        try:
            with progress_display(ns) as progress:
                result = execute(prepared, rig, stop=stop, progress=progress)
        finally:
            logging.getLogger().removeHandler(handler)
            handler.close()
    print(summary(result))
    print(f"run folder: {run_dir}")
    return exit_code(result)


def _track_summary(result: dict[str, Any]) -> str:
    share = result.get("holding_share")
    night_h = result["night_rig_time_s"] / 3600.0
    held = (f"held {setpoints_text(result['setpoints'])}" if result.get("held", True)
            else "held nothing (no recovery was accepted)")
    counts = ", ".join(count_text(int(result.get(key, 0)), key[:-1])
                       for key in ("corrections", "alarms", "retunes", "calibrations"))
    text = (f"track: {result['status']} ({result['stop_reason']}); {held}, left at "
            f"{result['left_at']}: {count_text(int(result.get('checks', 0)), 'check')} "
            f"({result.get('rechecks', 0)} repeated at once), {counts}; "
            f"holding took {'-' if share is None else f'{share:.1%}'} of {night_h:.2f} h of rig "
            f"time (budget {result['budget_fraction']:.0%})")
    if result.get("budget_unheld_s"):
        text += (f"; {result['budget_unheld_s'] / 60:.1f} min not held because of the budget "
                 f"({count_text(int(result.get('budget_limited', 0)), 'budget decision')})")
    first, last = result.get("step_outlook") or {}, result.get("last_step_outlook") or {}
    if first.get("warning"):
        text += f"; warned before its first check: {first['warning']}"
    if last.get("later") and last.get("warning"):
        text += (f"; warned at its last plan that crossed {last['within_s'] / 60:.0f} min: "
                 f"{last['warning']}")
    if "inversion" in result:
        low, high = result["inversion_interval"]
        text += (f"; last measurement: inversion {result['inversion']:.3f} [{low:.3f}, "
                 f"{high:.3f}], phase shift {result['phase_shift_rad'] / 3.141592653589793:.3f} pi")
    return text


def cmd_track(ns: argparse.Namespace) -> int:
    if ns.interval_s is not None or ns.cycles is not None:
        print("autotune: track: --interval-s and --cycles were removed: track now holds the "
              "condition all night in one run folder, with checks at a cadence it plans from the "
              "measured drift and noise within [track] budget_fraction; end the night with "
              "[track] max_rig_time_s, max_wall_time_s or end_at_local_time in the config, or "
              "with SIGINT/SIGTERM (README: Holding the condition overnight)", file=sys.stderr)
        return EXIT_BAD_INPUT
    return _act_on_rig(ns, "track", _deferred("autotune.run.track", "prepare_track"),
                       _deferred("autotune.run.track", "execute_track"), _track_summary,
                       lambda r: EXIT_OK if r["status"] == "ended" else EXIT_BELOW_ACCEPTANCE)
