"""The ``autotune`` command: the only place that configures logging and exits.

Commands
--------
rig        serve the bundled simulated rig over the bus
serve      serve a lab's rig driver (DRIVER.toml) over the bus
probe      check a rig server against the wire protocol, rule by rule
calibrate  full calibration of a rig
retune     check the last good calibration; search a narrowed box if it no longer holds
dry-run    start the simulated rig, calibrate, thermal step, retune, compare with the truth
report     summary and figure of a run folder
track      hold the condition through the night: a lock, a sequential test, retunes

Exit codes
----------
0    success (calibration accepted, retune accepted or still good)
1    internal error (a bug of autotune): the rig was sent to its safe set-points, the journal
     closed; the run can be resumed
2    bad input: configuration, command line, missing or damaged files, a refused set-point,
     a last good store that cannot be written, a run folder in use by another process
3    rig unreachable or failing: timeout, refusal, protocol error, interlock that stayed set,
     a rig that kept answering with other set-points than those applied, a rig leased to
     another client (``--wait-lease-s`` waits for it)
4    the stage was not accepted: the verified inversion is below [acceptance] min_inversion,
     or (phase lock) the predicted shortfall's bound misses the target, the optimum is not
     bracketed inside the box, or the lock was not established; one line says what to check;
     the last good calibration is untouched
130  stopped by SIGINT/SIGTERM (the message says whether the rig confirmed its safe
     set-points; the journal is closed and the run can be resumed)

``rig`` and ``serve`` exit 0 after a clean stop (SIGINT/SIGTERM), 1 if the endpoint cannot be
bound, 2 for a bad configuration, flag, key file or driver class, and ``serve`` 3 if the driver
fails while starting (its hardware cannot be reached). ``probe`` exits 0 when every rule passes
(warnings allowed), 1 when a rule fails, 2 for bad input, 3 if the rig does not answer, 5 when
no rule failed but some were not run (no consent to move the rig, an interlock, busy, or a
range too narrow for a rule), 130 on SIGINT.
"""

from __future__ import annotations

import argparse
import atexit
import dataclasses
import difflib
import importlib
import logging
import math
import os
import re
import shlex
import signal
import subprocess
import sys
import tempfile
import textwrap
import threading
import time
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import structlog

from autotune import __version__
from autotune.config import RunConfig, load_config, packaged_config
from autotune.errors import (
    AutotuneError,
    ConfigError,
    Interrupted,
    JournalError,
    LimitError,
    RigError,
    RigLeased,
    RigTimeout,
)
from autotune.run.journal import JOURNAL_NAME, LOG_NAME, RESULT_NAME, already_ended, utc_now, write_json_atomic
from autotune.run.runlock import HOLDER_NAME, LOCK_NAME, hold_run_folder
from autotune.plausible import SEED_MAX, SERVER_TIMEOUT_S, THERMAL_STEP_HZ, Plausible
from autotune.progress import count_text, setpoint_value_text, setpoints_text
from autotune.run.display import ProgressDisplay, progress_mode, progress_text

__all__ = ["main", "EXIT_OK", "EXIT_INTERNAL", "EXIT_BAD_INPUT", "EXIT_RIG",
           "EXIT_BELOW_ACCEPTANCE", "EXIT_INTERRUPTED"]

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2
EXIT_RIG = 3
EXIT_BELOW_ACCEPTANCE = 4
EXIT_INTERRUPTED = 130

CAUTION = textwrap.fill(
    "CAUTION: autotune moves set-points of a real apparatus (Stark-tuning electrodes, velocity-"
    "selection lasers, detector high voltage through the control system). It stays within the "
    "configured limits and step sizes and sends the rig to its safe set-points on abort, but it "
    "is no substitute for the lab's interlocks and local safety rules, which always take "
    "precedence. Do not run it on a rig you are not authorised to operate.",
    width=100, break_on_hyphens=False)

#: The exit codes of calibrate and retune, for their --help.
_STAGE_EXITS = (" Exit 0 when the verified setting is accepted (or the checked one still good), "
                "4 when its inversion is below min_inversion (the rig is left there), 2 for bad "
                "input (config, flags, run folder), 3 when the rig does not answer or refuses, "
                "130 on SIGINT/SIGTERM (continue with the printed --resume command), 1 for an "
                "internal error.")

_log = structlog.get_logger("autotune.cli")


# -- logging -----------------------------------------------------------------------------

#: Keys whose value is a set of set-points ({name: value}), shown in the set-point's units.
_SETPOINT_KEYS = frozenset({"setpoints", "target", "applied", "from", "best_setpoints"})
#: Keys left out of a console line: shown elsewhere on the line, or plumbing.
_CONSOLE_HIDDEN = frozenset({"timestamp", "level", "event", "logger", "logger_name", "run",
                             "stage", "command", "what", "reason", "exception", "msg_id",
                             "_record", "_from_structlog",
                             # a retune's verdict says both in words in its reason
                             "still_good", "in_range"})


def _setpoint_text(name: str, value: Any) -> str:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return f"{name} {value}"
    return f"{name} {setpoint_value_text(name, float(value))}"


def _console_value(key: str, value: Any) -> str | None:
    """One value in the units a physicist reads; None to leave it out of the console line."""
    if key in _SETPOINT_KEYS and isinstance(value, dict):
        return ", ".join(_setpoint_text(k, v) for k, v in value.items())
    if key == "counts" and isinstance(value, dict):
        return " ".join(f"{k} {v}" for k, v in value.items())
    if value is None or isinstance(value, dict | list | tuple | set):
        return None  # nothing to show; nested data stays in the run folder's log.jsonl
    if isinstance(value, bool) or not isinstance(value, float):
        return str(value)
    if key in ("velocity",) or key.endswith("_m_per_s"):
        return f"{value:.1f} m/s"
    if key == "detuning" or key.endswith("_hz"):
        return f"{value / 1e3:+.2f} kHz"
    if key.endswith("_rad"):
        return f"{value / math.pi:.3f} pi"
    if key.endswith("_s"):
        return f"{value:.1f} s"
    if "inversion" in key or key in ("predicted", "absorption", "stderr"):
        return f"{value:.3f}"
    return f"{value:.4g}"


def _console_name(key: str) -> str:
    """A key as words, its unit suffix dropped (the value carries the unit shown); a second
    set of set-points is named (``from ...``, ``target ...``), the one in force is not."""
    for suffix in ("_m_per_s", "_hz", "_rad", "_s"):
        if key.endswith(suffix) and key != suffix[1:]:
            key = key[: -len(suffix)]
            break
    return key.replace("_", " ")


#: A console line's length at most (characters); the run folder's log.jsonl keeps the rest.
CONSOLE_WIDTH = 150
_MORE = " [...]"


def _fit_console(line: str, head: str) -> str:
    """``line`` if short enough; else its head without the details, cut at the last clause
    boundary that fits and marked ``[...]`` (the whole text is in the run's log.jsonl)."""
    if len(line) <= CONSOLE_WIDTH:
        return line
    if len(head) <= CONSOLE_WIDTH:
        return head
    room = CONSOLE_WIDTH - len(_MORE)
    # The decision usually ends the text, after its last top-level ': ': kept when short.
    depth, tail = 0, ""
    for k, char in enumerate(head):
        depth += {"(": 1, ")": -1}.get(char, 0)
        if depth == 0 and head.startswith(": ", k) and k > len(head) - 70:
            tail = head[k:]
            break
    room = CONSOLE_WIDTH - len(_MORE) - len(tail)
    # A whole clause if one ends late enough, else whole words; never inside parentheses.
    depth, clause, word = 0, -1, -1
    for k, char in enumerate(head[:room]):
        depth += {"(": 1, ")": -1}.get(char, 0)
        if depth == 0 and char == " ":
            word = k
            if head[k - 1] in ";:,":
                clause = k - 1
    cut = clause if clause > 0.6 * room else word if word > room // 2 else room
    return head[:cut].rstrip(" ,;:") + _MORE + tail


def _console_line(_logger: Any, _method: str, event_dict: dict[str, Any]) -> str:
    """A log event as one short line: time, stage, what happened and why, values in units.

    Every number is rounded for reading; the run folder's ``log.jsonl`` keeps full precision
    and the nested details left out here.
    """
    stamp = str(event_dict.get("timestamp", ""))
    clock = stamp[11:19] if len(stamp) >= 19 else stamp
    level = str(event_dict.get("level", "info"))
    stage = event_dict.get("stage") or event_dict.get("command")
    event = str(event_dict.get("event", ""))
    parts = [clock]
    if level not in ("info", "debug"):
        parts.append(level.upper())
    if stage:
        parts.append(f"{stage}:")
    if event == "decision":
        head = f"{event_dict.get('what')}: {event_dict.get('reason')}"
    elif event == "estimate" and "inversion" in event_dict:
        interval = ""
        if "inversion_low" in event_dict and "inversion_high" in event_dict:
            interval = (f" [{event_dict['inversion_low']:.3f}, "
                        f"{event_dict['inversion_high']:.3f}]")
        head = (f"{event_dict.get('label')} {event_dict.get('point')}: inversion "
                f"{event_dict['inversion']:.3f}{interval}")
    else:
        head = event
    shown = {"inversion", "inversion_low", "inversion_high", "label", "point"} \
        if event == "estimate" else set()
    details = []
    for key, value in event_dict.items():
        if key in _CONSOLE_HIDDEN or key in shown:
            continue
        text = _console_value(key, value)
        if text is not None:
            details.append(text if key == "setpoints" else f"{_console_name(key)} {text}")
    line = " ".join(parts + [head])
    if details:
        line += " (" + "; ".join(details) + ")"
    line = _fit_console(line, " ".join(parts + [head]))
    if event_dict.get("exception"):
        line += "\n" + str(event_dict["exception"])
    return line


class _MergeRepeats(logging.Filter):
    """Merge a warning repeated on the console: the same line again (its numbers aside) is held
    back and counted, and one line says how many were held before the next different line (or
    at exit). The run folder's log.jsonl, written by another handler, keeps every one."""

    _NUMBERS = re.compile(r"[-+]?\d[\d.,:]*(?:e[-+]?\d+)?")

    def __init__(self, handler: logging.Handler) -> None:
        super().__init__()
        self.handler = handler
        self.key: str | None = None
        self.count = 0
        atexit.register(self.flush)

    def filter(self, record: logging.LogRecord) -> bool:
        if getattr(record, "_merge_note", False):
            return True
        try:
            line = self.handler.format(record)
        except Exception:  # noqa: BLE001 - a line that cannot be formatted is not merged
            return True
        key = self._NUMBERS.sub("#", line.split(" ", 1)[-1])
        if record.levelno >= logging.WARNING and key == self.key:
            self.count += 1
            return False
        self.flush()
        self.key = key if record.levelno >= logging.WARNING else None
        return True

    def flush(self) -> None:
        """Say how many repeats were held back, if any."""
        if not self.count:
            return
        count, self.count = self.count, 0
        note = logging.makeLogRecord({
            "msg": f"the warning above repeated {count} more time{'s' if count > 1 else ''} "
                   f"(each in the run folder's {LOG_NAME})",
            "levelno": logging.WARNING, "levelname": "WARNING", "_merge_note": True})
        for handler in logging.getLogger().handlers:
            if self in handler.filters:
                handler.handle(note)


def _configure_logging(level: str) -> None:
    """Short readable lines on stderr at ``level``; a JSON file handler (every level, full
    precision) is added per run folder."""
    shared: list[Any] = [
        structlog.contextvars.merge_contextvars,
        structlog.stdlib.add_log_level,
        structlog.stdlib.add_logger_name,
        structlog.processors.TimeStamper(fmt="iso", utc=True),
    ]
    structlog.configure(
        processors=[*shared, structlog.stdlib.ProcessorFormatter.wrap_for_formatter],
        logger_factory=structlog.stdlib.LoggerFactory(),
        wrapper_class=structlog.stdlib.BoundLogger,
        cache_logger_on_first_use=False,
    )
    handler = logging.StreamHandler(sys.stderr)
    handler.setLevel(level.upper())
    handler.setFormatter(structlog.stdlib.ProcessorFormatter(
        processors=[structlog.stdlib.ProcessorFormatter.remove_processors_meta,
                    structlog.processors.format_exc_info,
                    _console_line],
        foreign_pre_chain=shared,
    ))
    handler.addFilter(_MergeRepeats(handler))
    root = logging.getLogger()
    root.handlers[:] = [handler]
    # The root passes everything of autotune on: the console handler filters by --log-level,
    # the run folder's JSON file keeps the debug lines (moves, acquisitions) too.
    root.setLevel(logging.DEBUG)
    for noisy in ("matplotlib", "PIL", "asyncio", "distributed", "fsspec"):
        logging.getLogger(noisy).setLevel(logging.WARNING)
    _configure_logging.shared = shared  # type: ignore[attr-defined]


def _log_to_run_folder(run_dir: Path) -> logging.Handler:
    run_dir.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(run_dir / LOG_NAME, encoding="utf-8")
    handler.setFormatter(structlog.stdlib.ProcessorFormatter(
        processors=[structlog.stdlib.ProcessorFormatter.remove_processors_meta,
                    structlog.processors.dict_tracebacks,
                    structlog.processors.JSONRenderer()],
        foreign_pre_chain=getattr(_configure_logging, "shared", []),
    ))
    logging.getLogger().addHandler(handler)
    return handler


# -- progress ----------------------------------------------------------------------------

def _progress_display(ns: argparse.Namespace) -> ProgressDisplay:
    """The progress display of a stage, as the command's options ask (``--quiet``: none); use
    it as a context manager and give it to the run as its progress observer."""
    return ProgressDisplay(progress_mode(quiet=getattr(ns, "quiet", False)), progress_text)


# -- signals -----------------------------------------------------------------------------

def _install_stop_handlers(at_once: Callable[[], str] = lambda: "") -> threading.Event:
    """SIGINT/SIGTERM of a command that acts on a rig: the first sets the returned event (the
    call in flight is abandoned within a fraction of a second, then ``safe`` is tried within
    ``[recovery] safe_on_stop_s``); a second one ends the process at once (exit 130), after
    printing what that leaves and ``at_once()`` (which may also clean up: the resume hint)."""
    stop = threading.Event()

    def handler(signum: int, _frame: object) -> None:
        if stop.is_set():
            try:
                more = at_once()
            except Exception as exc:  # noqa: BLE001 - the exit must happen whatever
                more = f" ({type(exc).__name__}: {exc})"
            # os.write: a print could be re-entered while the main thread is printing.
            os.write(2, (f"autotune: stopped at once by a second signal "
                         f"({signal.Signals(signum).name}): the rig did NOT confirm its safe "
                         f"set-points; check it before leaving it; the journal keeps every "
                         f"record written.{more}\n").encode())
            os._exit(EXIT_INTERRUPTED)
        _log.warning("stop_requested", signal=signal.Signals(signum).name,
                     reason="abandoning the call in flight, then safe set-points; a second "
                            "signal stops at once")
        stop.set()

    signal.signal(signal.SIGINT, handler)
    signal.signal(signal.SIGTERM, handler)
    return stop


# -- helpers -----------------------------------------------------------------------------

def _default_run_dir(command: str) -> Path:
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    return Path("runs") / f"{command}-{stamp}"


def _connect(config: RunConfig, stop: threading.Event | None = None) -> Any:
    from autotune.wire.bus import BusClient, CurveClientKeys
    from autotune.wire.protocol import SetpointLimit

    curve = None
    if config.bus.curve is not None:
        curve = CurveClientKeys.load(config.bus.curve.client_secret_key_file,
                                     config.bus.curve.server_public_key_file)
    limits = {sp.name: SetpointLimit(unit=sp.unit, min=sp.limit_min, max=sp.limit_max,
                                     max_step=sp.max_step) for sp in config.setpoints}
    return BusClient(config.bus.endpoint, timeout_s=config.bus.timeout_s,
                     retries=config.bus.retries, backoff_s=config.bus.backoff_s, curve=curve,
                     limits=limits, source=config.source, stop=stop,
                     stop_safe_s=config.recovery.safe_on_stop_s)


def _claim_rig(rig: Any, command: str, wait_s: float, config: RunConfig,
               stop: threading.Event | None) -> None:
    """Take the rig's lease for this process before anything moves (kept renewed, released
    when the client closes); a rig without leases goes on with one warning. The claim has the
    run's recovery, as every rig call of a run (a claim again by the holder only renews).

    Raises
    ------
    RigLeased
        Another client holds the rig (still, after ``wait_s`` seconds).
    """
    from autotune.run import runner
    from autotune.wire.bus import client_identity

    identity = client_identity(command)
    runner.opening_call("claim", lambda: rig.claim(identity, wait_s=wait_s), config, rig, stop)


def _summary(result: dict[str, Any]) -> str:
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


def _stop_message(exc: Interrupted, resume_hint: str | None) -> str:
    """What a stop did to the rig, truthfully, and how to continue."""
    if exc.safe is True:
        rig = "the rig confirmed its safe set-points"
    elif exc.safe is False:
        rig = (f"the rig did NOT confirm its safe set-points ({exc.safe_detail}); check it "
               f"before leaving it")
    else:
        rig = "no move was in progress; the rig was left at its present set-points"
    text = f"autotune: stopped by signal; {rig}; the journal is closed."
    if resume_hint:
        text += f" Continue with: {resume_hint}"
    return text


def _safe_message(exc: BaseException) -> str | None:
    """What a run stopped by an error did to the rig, when it tried its safe set-points."""
    safe = getattr(exc, "rig_safe", None)
    if safe is True:
        return "autotune: the rig confirmed its safe set-points; the journal is closed"
    if safe is False:
        return (f"autotune: the rig did NOT confirm its safe set-points "
                f"({getattr(exc, 'rig_safe_detail', '')}); check it before leaving it")
    return None


def _guarded(action: Callable[[], int], resume_hint: Callable[[], str | None] = lambda: None
             ) -> int:
    """Run a command body, mapping the error tree to exit codes with one clear message."""
    try:
        return action()
    except Interrupted as exc:
        print(_stop_message(exc, resume_hint()), file=sys.stderr)
        return EXIT_INTERRUPTED
    except (ConfigError, LimitError, JournalError) as exc:
        print(f"autotune: {exc}", file=sys.stderr)
        if (safe := _safe_message(exc)) is not None:
            print(safe, file=sys.stderr)
        hint = resume_hint()
        if isinstance(exc, JournalError) and hint and "store" in str(exc):
            print(f"autotune: after correcting it, continue with: {hint}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except RigLeased as exc:
        hint = resume_hint()
        if not hint:
            print(f"autotune: {exc.detail}: another client is driving this rig; nothing was "
                  f"moved (it was only described). Wait for that run to end, or let this command wait for the rig "
                  f"with --wait-lease-s SECONDS", file=sys.stderr)
        else:
            print(f"autotune: {exc.detail}: this run lost the rig's lease (it could not renew it "
                  f"in time) and stopped without sending the rig anywhere; the journal is "
                  f"closed. Once the rig is free, continue with: {hint}", file=sys.stderr)
        return EXIT_RIG
    except RigError as exc:
        print(f"autotune: rig error: {exc}", file=sys.stderr)
        if (safe := _safe_message(exc)) is not None:
            print(safe, file=sys.stderr)
        hint = resume_hint()
        if isinstance(exc, RigTimeout) and not hint:
            print("autotune: the rig gave no reply before the run began (none came, or every "
                  "one was lost, through the bus's and [recovery]'s retries): nothing was moved "
                  "and no journal was written; check that the rig's server is running and "
                  "listening at the config's [bus] endpoint ('autotune probe ENDPOINT' checks a "
                  "server)", file=sys.stderr)
        if hint:
            print(f"autotune: once the rig answers again, continue with: {hint}",
                  file=sys.stderr)
        return EXIT_RIG
    except AutotuneError as exc:
        print(f"autotune: {exc}", file=sys.stderr)
        if (safe := _safe_message(exc)) is not None:
            print(safe, file=sys.stderr)
        return EXIT_BAD_INPUT
    except Exception as exc:  # noqa: BLE001 - the last line of defence prints and exits
        _log.exception("internal_error")
        print(f"autotune: internal error (a bug of autotune, please report it): "
              f"{type(exc).__name__}: {exc}", file=sys.stderr)
        if (safe := _safe_message(exc)) is not None:
            print(safe, file=sys.stderr)
        hint = resume_hint()
        if hint:
            print(f"autotune: the run can be continued with: {hint}", file=sys.stderr)
        return EXIT_INTERNAL


# -- commands ----------------------------------------------------------------------------

# -- rig, serve, probe: serving rigs and checking them --------------------------------------

EXIT_PROBE_FAILED = 1
EXIT_PROBE_INCOMPLETE = 5
_SIM_RIG_CONFIG = packaged_config("sim-rig.toml")


def _configure_server_logging(level: str) -> None:
    """Servers log one JSON object per line on stderr (for the lab's log collector)."""
    structlog.configure(
        processors=[
            structlog.contextvars.merge_contextvars,
            structlog.processors.add_log_level,
            structlog.processors.TimeStamper(fmt="iso", utc=True),
            structlog.processors.format_exc_info,
            structlog.processors.JSONRenderer(),
        ],
        wrapper_class=structlog.make_filtering_bound_logger(getattr(logging, level.upper())),
        logger_factory=structlog.PrintLoggerFactory(sys.stderr),
        cache_logger_on_first_use=False,
    )


def _add_server_arguments(parser: argparse.ArgumentParser, *, bind_default: str | None) -> None:
    bind_help = "endpoint to listen on; port 0 picks a free one"
    if bind_default is None:
        bind_help += " (default: [server] bind of the config, else tcp://127.0.0.1:5560)"
    else:
        bind_help += " (default: %(default)s)"
    parser.add_argument("--bind", default=bind_default, help=bind_help)
    parser.add_argument("--ready-file", type=Path, default=None,
                        help="write the bound endpoint to this file once listening")
    parser.add_argument("--curve-secret-key", type=Path, default=None,
                        help="server CURVE secret key file (zmq.auth .key_secret)")
    parser.add_argument("--curve-allowed-dir", type=Path, default=None,
                        help="folder of allowed client public keys (*.key)")
    parser.add_argument("--log-level", dest="server_log_level", default=None,
                        choices=["debug", "info", "warning", "error"],
                        help="log level of the JSON lines on stderr (default: info)")


def _curve_server_keys(secret: Path | None, allowed: Path | None, source: str) -> Any:
    from autotune.kit.server import CurveServerKeys

    if (secret is None) != (allowed is None):
        raise ConfigError(source, "--curve-secret-key/--curve-allowed-dir", "both or neither",
                          "only --curve-secret-key" if secret is not None else "only --curve-allowed-dir")
    return None if secret is None else CurveServerKeys.load(secret, allowed)


def _stop_signals(woken: bytes) -> int:
    """How many of the signals written to the wake-up fd ask for a stop: each is one byte, its
    number. Any signal with a Python handler is written there, a driver's own too (its SIGALRM
    read timeouts, a SIGUSR1 or SIGHUP of its library): those are not a stop."""
    return sum(1 for number in woken if number in (signal.SIGINT, signal.SIGTERM))


class _StopGuard:
    """SIGINT/SIGTERM while a server answers requests.

    The first signal asks the server to stop at its next wake-up. The server's own thread may be
    inside a driver call that does not return (an instrument that hangs): a watcher thread, told
    of each signal through the interpreter's wake-up file descriptor (so even while the main
    thread is blocked), logs the call being waited for and, when the server has not finished
    stopping ``bound_s`` later or at a second signal, logs what it abandons and ends the process
    at once with exit status 3 (the driver's ``close`` is not called; the hardware is as that
    call left it).
    """

    def __init__(self, server: Any, served: Any, bound_s: float, log: Any) -> None:
        self.server, self.served, self.bound_s, self.log = server, served, bound_s, log
        self.finished = threading.Event()
        self._previous: dict[int, Any] = {}
        self._previous_fd = -1
        self._pipe: tuple[int, int] | None = None
        self._watcher: threading.Thread | None = None

    def _call_text(self) -> str:
        current = getattr(self.served, "call_in_progress", None)
        return "none" if current is None else f"driver.{current[0]}() running for {current[1]:.1f} s"

    def __enter__(self) -> _StopGuard:
        read_fd, write_fd = os.pipe()
        os.set_blocking(write_fd, False)
        self._pipe = (read_fd, write_fd)
        self._previous_fd = signal.set_wakeup_fd(write_fd, warn_on_full_buffer=False)
        for number in (signal.SIGINT, signal.SIGTERM):
            self._previous[number] = signal.signal(number, lambda signum, frame: self.server.stop())
        self._watcher = threading.Thread(target=self._watch, name="stop-guard", daemon=True)
        self._watcher.start()
        return self

    def _watch(self) -> None:
        import select

        assert self._pipe is not None
        signals, first = 0, None
        while not self.finished.is_set():
            ready, _, _ = select.select([self._pipe[0]], [], [], 0.2)
            if ready:
                try:
                    signals += _stop_signals(os.read(self._pipe[0], 64))
                except OSError:
                    return
            if signals and first is None:
                first = time.monotonic()
                self.log.warning("stop_requested", call_in_progress=self._call_text(),
                                 reason=f"stopping; a driver call still running after "
                                        f"{self.bound_s:g} s (stop_timeout_s), or a second "
                                        f"signal, ends the server at once")
            if first is not None and not self.finished.is_set() and (
                    signals >= 2 or time.monotonic() - first > self.bound_s):
                self.log.error("stop_forced", call_in_progress=self._call_text(),
                               reason="a second signal" if signals >= 2 else
                               f"the server had not stopped {self.bound_s:g} s after the signal",
                               consequence="exit 3 without the driver's close(): the hardware "
                                           "is as the abandoned call left it; check it")
                sys.stderr.flush()
                os._exit(EXIT_RIG)

    def __exit__(self, *exc: object) -> None:
        self.finished.set()
        for number, handler in self._previous.items():
            signal.signal(number, handler)
        signal.set_wakeup_fd(self._previous_fd)
        if self._watcher is not None:
            # Its select must not meet a closed (or reused) descriptor: it ends within 0.2 s.
            self._watcher.join()
            self._watcher = None
        if self._pipe is not None:
            for fd in self._pipe:
                os.close(fd)
            self._pipe = None


def _serve_until_stopped(served: Any, bind: str, *, faults: Any, curve: Any, fault_seed: int,
                         ready_file: Path | None, log: Any, stop_timeout_s: float = 30.0,
                         safe_on_stop: bool = False) -> int:
    """Bind, write the ready file, answer requests until SIGINT/SIGTERM; the exit status.

    A stop waits at most ``stop_timeout_s`` for a driver call in progress (see
    :class:`_StopGuard`); with ``safe_on_stop`` the driver's safe procedure runs before its
    ``close``."""
    import zmq

    from autotune.kit.server import RigServer, write_ready_file

    try:
        server = RigServer(served, bind, faults=faults, curve=curve, fault_seed=fault_seed)
    except ConfigError as exc:
        _refused_to_start(log, exc)
        return EXIT_BAD_INPUT
    code = EXIT_OK
    served_requests = False
    with _StopGuard(server, served, stop_timeout_s, log):
        try:
            try:
                endpoint = server.start()
            except zmq.ZMQError as exc:
                if progress_mode(quiet=False) != "terminal":
                    log.error("server_bind_failed", error=str(exc))
                print(f"autotune: the server did not start: cannot listen on {bind} "
                      f"({zmq.strerror(exc.errno)}); --bind another endpoint, or port 0 for a "
                      "free one", file=sys.stderr)
                return 1
            served_requests = True
            if ready_file is not None:
                write_ready_file(ready_file, endpoint)
            server.serve()
        finally:
            server.close()
            # Not when it never listened: a second serve started by mistake on a port in use
            # must not move the hardware another server's client is working with.
            if safe_on_stop and served_requests:
                try:
                    served.safe()
                except BaseException as exc:  # noqa: BLE001 - reported; the stop goes on
                    log.error("safe_on_stop_failed", error=f"{type(exc).__name__}: {exc}",
                              consequence="the hardware was left where it was; check it")
                    code = EXIT_RIG
            close = getattr(served, "close", None)
            if callable(close):
                try:
                    close()
                except BaseException as exc:  # noqa: BLE001 - the driver's own shutdown; report, exit anyway
                    log.error("driver_close_failed", error=f"{type(exc).__name__}: {exc}")
    return code


def _child_seed(seed: int) -> int:
    import numpy as np

    return int(np.random.SeedSequence(seed).spawn(1)[0].generate_state(1)[0])


def _refused_to_start(log: Any, exc: BaseException) -> None:
    """A server that will not start: a sentence for the person, and its JSON log line where
    stderr goes to a log collector (a file or a pipe; on a terminal the sentence is all)."""
    if progress_mode(quiet=False) != "terminal":
        log.error("server_refused_to_start", error=str(exc), error_type=type(exc).__name__)
    print(f"autotune: the server did not start: {exc}", file=sys.stderr)


def _cmd_rig(ns: argparse.Namespace) -> int:
    # The simulated rig is imported only by the commands that serve or start it.
    from autotune.kit.served import ServedDriver
    from autotune.kit.server import FaultConfig
    from drivers_sim.config import load_sim_config
    from drivers_sim.driver import SimulatedDriver
    from drivers_sim.rig import SimulatedRig

    _configure_server_logging(ns.server_log_level or _console_level(ns))
    log = structlog.get_logger("autotune.rig").bind(bind=ns.bind)
    print("serving the SIMULATED rig: no hardware is touched", file=sys.stderr)
    try:
        curve = _curve_server_keys(ns.curve_secret_key, ns.curve_allowed_dir, "<flags>")
        config = load_sim_config(ns.config)
        faults = FaultConfig.from_table(config.faults or None, file=str(ns.config)).overridden(
            drop_reply_probability=ns.drop_probability,
            delay_reply_s=ns.delay_s,
            corrupt_reply_probability=ns.corrupt_probability,
            exit_after_messages=ns.exit_after,
        )
        seed = ns.seed if ns.seed is not None else config.rig.default_seed
        served = ServedDriver(SimulatedDriver(SimulatedRig(config, seed)), source=str(ns.config))
    except (ConfigError, OSError, ValueError) as exc:
        # The simulated rig's own configuration errors are ValueErrors; all refuse the start.
        _refused_to_start(log, exc)
        return EXIT_BAD_INPUT
    return _serve_until_stopped(served, ns.bind, faults=faults, curve=curve,
                                fault_seed=_child_seed(seed), ready_file=ns.ready_file, log=log)


def _cmd_serve(ns: argparse.Namespace) -> int:
    from autotune.kit.driver_config import load_driver_config
    from autotune.kit.server import FaultConfig

    _configure_server_logging(ns.server_log_level or _console_level(ns))
    log = structlog.get_logger("autotune.serve").bind(config=str(ns.config))
    try:
        config = load_driver_config(ns.config)
        bind = ns.bind or config.bind
        if ns.curve_secret_key is not None or ns.curve_allowed_dir is not None:
            curve = _curve_server_keys(ns.curve_secret_key, ns.curve_allowed_dir, "<flags>")
        else:
            curve = _curve_server_keys(config.curve_secret_key_file, config.curve_allowed_dir,
                                       str(ns.config))
    except ConfigError as exc:
        _refused_to_start(log, exc)
        return EXIT_BAD_INPUT
    log = log.bind(bind=bind)
    started = _start_driver(config, log)
    if isinstance(started, int):
        return started
    served = started
    if served.description.simulated:
        print(f"serving the SIMULATED rig {served.description.rig!r}: no hardware is touched",
              file=sys.stderr)
    else:
        print(CAUTION + " autotune serve hands the requests of any authorised client to this "
              "driver; the limits and steps of its DRIVER.toml are the server's last software "
              "guard.", file=sys.stderr)
    log.info("driver_loaded", rig=served.description.rig, driver=config.driver_class,
             simulated=served.description.simulated, setpoints=served.channel_map.summary())
    return _serve_until_stopped(served, bind, faults=FaultConfig(), curve=curve, fault_seed=0,
                                ready_file=ns.ready_file, log=log,
                                stop_timeout_s=config.stop_timeout_s,
                                safe_on_stop=config.safe_on_stop)


def _start_driver(config: Any, log: Any) -> Any:
    """Build the lab's driver and describe it, within ``[server] start_timeout_s``: the
    :class:`~autotune.served.ServedDriver`, or the exit status when it cannot start (2 for a
    driver class or channel map that does not fit, 3 when it fails or hangs: its hardware is
    taken as unreachable; 0, a clean stop, on SIGINT/SIGTERM while waiting)."""
    from autotune.kit.driver_config import DriverStartError, build_driver
    from autotune.kit.served import ServedDriver

    outcome: dict[str, Any] = {}

    def start() -> None:
        driver = None
        try:
            driver = build_driver(config)
            outcome["served"] = ServedDriver(driver, config.setpoints, source=str(config.path))
        except BaseException as exc:  # noqa: BLE001 - reported by the waiting thread
            outcome["error"] = exc
            if driver is not None:
                _close_quietly(driver, log)

    stop = threading.Event()
    previous = {number: signal.signal(number, lambda signum, frame: stop.set())
                for number in (signal.SIGINT, signal.SIGTERM)}
    # A daemon thread: a driver that never returns cannot keep the process alive.
    worker = threading.Thread(target=start, name="driver-start", daemon=True)
    began = time.monotonic()
    try:
        worker.start()
        while worker.is_alive() and not stop.is_set() and \
                time.monotonic() - began < config.start_timeout_s:
            worker.join(0.1)
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler)
    if worker.is_alive():
        if stop.is_set():
            log.warning("driver_start_interrupted", waited_s=round(time.monotonic() - began, 1))
            return EXIT_OK
        log.error("driver_failed_to_start", error=f"the driver did not start within "
                  f"{config.start_timeout_s:g} s ([server] start_timeout_s of {config.path}): "
                  f"its hardware is taken as unreachable")
        return EXIT_RIG
    exc = outcome.get("error")
    if isinstance(exc, ConfigError):
        _refused_to_start(log, exc)
        return EXIT_BAD_INPUT
    if isinstance(exc, DriverStartError):
        log.error("driver_failed_to_start", error=str(exc))
        return EXIT_RIG
    if exc is not None:  # the lab's driver failed while describing itself
        log.error("driver_failed_to_start", error=f"{type(exc).__name__}: {exc}",
                  exc_info=exc)
        return EXIT_RIG
    return outcome["served"]


def _close_quietly(driver: Any, log: Any) -> None:
    close = getattr(driver, "close", None)
    if callable(close):
        try:
            close()
        except BaseException as exc:  # noqa: BLE001 - already failing; report and go on
            log.error("driver_close_failed", error=f"{type(exc).__name__}: {exc}")


def _probe_plan(description: Any, shots: int) -> str:
    lines = [f"The probe will move rig {description.rig!r} (not simulated):"]
    for name, limit in description.setpoints.items():
        lines.append(f"  {name}: steps of half and one max_step ({limit.max_step:g} {limit.unit}) "
                     f"within [{limit.min:g}, {limit.max:g}] {limit.unit}")
    lines.append("  two requests a conforming rig refuses: a value 0.1 % of a step beyond the "
                 "nearest limit and a step of 1.5 max_step (a rig that wrongly executes them moves)")
    lines.append("  four malformed applies (NaN, infinities) that must be refused")
    lines.append(f"  four acquisitions of {shots} shots (one request sent twice, one refused)")
    lines.append("  safe (the rig's safe set-points)")
    lines.append("  the lease rules: a second identity of the probe claims, applies the values in "
                 "force and acquires while the probe holds the rig (a conforming rig refuses "
                 "them) and sends safe")
    return "\n".join(lines)


def _cmd_probe(ns: argparse.Namespace) -> int:
    from autotune.wire.bus import CurveClientKeys
    from autotune.kit.probe import Link, Probe, summarise

    if "://" not in ns.endpoint:
        print(f"autotune: probe: ENDPOINT: expected a ZeroMQ endpoint such as "
              f"tcp://127.0.0.1:5560, got {ns.endpoint!r}", file=sys.stderr)
        return EXIT_BAD_INPUT
    try:
        if (ns.curve_client_secret_key is None) != (ns.curve_server_public_key is None):
            raise ConfigError("<flags>", "--curve-client-secret-key/--curve-server-public-key",
                              "both or neither", "only one")
        curve = None
        if ns.curve_client_secret_key is not None:
            curve = CurveClientKeys.load(ns.curve_client_secret_key, ns.curve_server_public_key)
    except ConfigError as exc:
        print(f"autotune: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT

    consented = False

    def consent(description: Any) -> tuple[bool, str]:
        nonlocal consented
        if description.simulated:
            consented = True
            return True, "the rig describes itself as simulated"
        print(CAUTION + "\n" + _probe_plan(description, ns.shots), file=sys.stderr)
        if ns.yes:
            consented = True
            return True, "--yes"
        if not sys.stdin.isatty():
            print("autotune: probe: not moving the rig: no terminal to ask and no --yes",
                  file=sys.stderr)
            return False, "no consent to move the rig (no terminal to ask and no --yes)"
        answer = input("Move the rig for the probe? Type 'yes' to go on: ")
        consented = answer.strip().lower() == "yes"
        return (True, "confirmed") if consented else (False, "no consent to move the rig (declined)")

    link = Link(ns.endpoint, timeout_s=ns.timeout_s, curve=curve)
    print(f"autotune probe {ns.endpoint} (protocol version 1, timeout {ns.timeout_s:g} s per reply)")
    probe = Probe(link, consent=consent, report=lambda f: print(f.line(), flush=True), shots=ns.shots)
    try:
        findings = probe.run()
    except KeyboardInterrupt:
        if consented:
            from autotune.wire import protocol

            msg_id = protocol.new_msg_id()
            link.reset()
            link.exchange(protocol.encode_request(protocol.Op.SAFE, {}, msg_id))
            print("autotune: probe stopped by SIGINT; safe sent to the rig", file=sys.stderr)
        return EXIT_INTERRUPTED
    finally:
        link.close()
    counts = summarise(findings)
    if probe.unreachable:
        code = EXIT_RIG
    elif counts["fail"]:
        code = EXIT_PROBE_FAILED
    elif counts["skip"]:
        code = EXIT_PROBE_INCOMPLETE
    else:
        code = EXIT_OK
    print(f"summary: {counts['pass']} passed, {counts['fail']} failed, {counts['warn']} "
          f"warnings, {counts['skip']} not run; exit {code}")
    return code


def _run_folder(ns: argparse.Namespace, command: str) -> tuple[Path, bool]:
    if ns.resume is not None:
        return Path(ns.resume), True
    return (Path(ns.out) if ns.out is not None else _default_run_dir(command)), False


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


def _cmd_stage(ns: argparse.Namespace, command: str) -> int:
    return _act_on_rig(ns, command, _deferred("autotune.run.runner", "prepare", command),
                       _deferred("autotune.run.runner", "execute"), _summary, _exit_for_result)


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
        stop = _install_stop_handlers(lambda: f" Continue with: {hint()}" if hint() else "")
        # One owner per run folder, from before the first request to the rig until the exit.
        with hold_run_folder(run_dir, command):
            return _act_on_rig_locked(ns, command, config, run_dir, resume, stop, prepare,
                                      execute, summary, exit_code, started)

    def hint() -> str | None:
        # A folder whose run never reached the rig has no journal: nothing to resume.
        if not started or not (started[0] / JOURNAL_NAME).exists():
            return None
        return _resume_command(command, ns.config, started[0])

    return _guarded(body, hint)


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
    with _connect(config, stop) as rig:
        # prepare only reads the rig (describe): its checks of the input come first, the
        # lease before the first move.
        prepared = prepare(rig, config, run_dir, resume=resume, stop=stop)
        _claim_rig(rig, command, getattr(ns, "wait_lease_s", 0.0), config, stop)
        print(CAUTION, file=sys.stderr)
        run_dir.mkdir(parents=True, exist_ok=True)
        started.append(run_dir)
        handler = _log_to_run_folder(run_dir)
        try:
            with _progress_display(ns) as progress:
                result = execute(prepared, rig, stop=stop, progress=progress)
        finally:
            logging.getLogger().removeHandler(handler)
            handler.close()
    print(summary(result))
    print(f"run folder: {run_dir}")
    return exit_code(result)


def _wait_for_ready(process: subprocess.Popen[bytes], ready: Path, log: Path,
                    timeout_s: float) -> str:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if ready.exists():
            endpoint = ready.read_text(encoding="utf-8").strip()
            if endpoint:
                return endpoint
        if process.poll() is not None:
            err = log.read_text(encoding="utf-8", errors="replace")
            raise RigError(f"the simulated rig exited with code {process.returncode} before "
                           f"listening: {err[-2000:]}")
        time.sleep(0.05)
    raise RigError(f"the simulated rig did not start listening within {timeout_s:g} s")


def _truth_block(rig: Any, chosen: dict[str, float]) -> dict[str, Any]:
    truth = rig.truth(chosen)
    return {
        "inversion_at_chosen": float(truth["inversion"]),
        "best_inversion": float(truth["best"]["inversion"]),
        "best_setpoints": {k: float(v) for k, v in truth["best"]["setpoints"].items()},
    }


def _cmd_dry_run(ns: argparse.Namespace) -> int:
    def body() -> int:
        config_path = Path(ns.config) if ns.config else packaged_config("dry-run.toml")
        rig_config = Path(ns.rig_config) if ns.rig_config else packaged_config("sim-rig.toml")
        for path, flag in ((config_path, "--config"), (rig_config, "--rig-config")):
            if not path.is_file():
                raise ConfigError(str(path), "<file>", f"an existing file (pass {flag})",
                                  "no such file")
        config = load_config(config_path)
        # The rig's own config is read again by the rig process; a bad one must be refused
        # here, naming the file, before the run folder exists.
        from drivers_sim.config import SimConfigError, load_sim_config
        try:
            load_sim_config(rig_config)
        except SimConfigError as exc:
            print(f"autotune: {exc}", file=sys.stderr)
            return EXIT_BAD_INPUT
        if ns.seed is not None:
            config = dataclasses.replace(
                config, search=dataclasses.replace(config.search, seed=ns.seed))
        out = Path(ns.out) if ns.out else _default_run_dir("dry-run")
        with hold_run_folder(out, "dry-run"):
            if any(p.name not in (LOCK_NAME, HOLDER_NAME) for p in out.iterdir()):
                raise JournalError(f"{out} is not empty; choose another --out")
            return _dry_run_in(ns, config, config_path, rig_config, out)

    return _guarded(body)


def _dry_run_in(ns: argparse.Namespace, config: RunConfig, config_path: Path, rig_config: Path,
                out: Path) -> int:
    """The body of ``dry-run`` once this process holds the lock of its folder ``out``."""
    from autotune.run import runner

    rig_process: list[subprocess.Popen[bytes]] = []

    def at_once() -> str:
        for process in rig_process:  # its own session: no signal of ours reaches it
            process.kill()
        return " The simulated rig was stopped."

    stop = _install_stop_handlers(at_once)
    seed = config.search.seed
    print("dry run on the bundled SIMULATED rig: no hardware is touched. On a real rig, "
          "calibrate/retune act on hardware:\n" + CAUTION, file=sys.stderr)
    with tempfile.TemporaryDirectory() as tmp:
        ready = Path(tmp) / "endpoint"
        command = [sys.executable, "-m", "autotune.cli", "rig", "--config", str(rig_config),
                   "--bind", "tcp://127.0.0.1:0", "--seed", str(seed), "--ready-file",
                   str(ready), "--log-level", "warning"]
        # The rig's log goes to a file: an unread pipe could fill and stall the rig. Its own
        # session keeps a Ctrl-C at the terminal from stopping it before our safe request.
        rig_log = (out / "rig.log").open("wb")
        process = subprocess.Popen(command, stdin=subprocess.DEVNULL,
                                   stdout=subprocess.DEVNULL, stderr=rig_log,
                                   start_new_session=True)
        rig_process.append(process)
        try:
            endpoint = _wait_for_ready(process, ready, out / "rig.log", timeout_s=60.0)
            config = dataclasses.replace(
                config, bus=dataclasses.replace(config.bus, endpoint=endpoint))
            return _dry_run_stages(ns, config, out, endpoint, stop, runner)
        finally:
            process.terminate()
            try:
                process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(timeout=10)
            rig_log.close()


def _dry_run_stages(ns: argparse.Namespace, config: RunConfig, out: Path, endpoint: str,
                    stop: threading.Event, runner: Any) -> int:
    store = out / "last-good.json"
    rows = []
    exit_code = EXIT_OK
    with _connect(config, stop) as rig:
        _claim_rig(rig, "dry-run", 0.0, config, stop)
        description = runner.opening_call("describe", rig.describe, config, rig, stop)
        print(f"simulated rig {description.rig!r} listening on {endpoint} "
              f"(seed {config.search.seed})")
        stages = ["calibrate"] if ns.no_retune else ["calibrate", "retune"]
        thermal: dict[str, Any] = {}
        for name in stages:
            if name == "retune":
                if not rows[-1][1]["accepted"]:
                    print("retune skipped: the calibration was not accepted, so there is no "
                          "last good setting to retune from")
                    break
                step = rig.thermal_step(ns.thermal_step_hz)
                # In the retune's manifest, so that its report marks when the cavity jumped.
                thermal = {"thermal_step": {"shift_hz": ns.thermal_step_hz,
                                            "clock": step["clock"], "t_wall": utc_now(),
                                            "cavity_offset_hz": step["cavity_offset_hz"]}}
                print(f"thermal step of {ns.thermal_step_hz / 1e3:+.1f} kHz applied to the "
                      f"simulated cavity (offset now {step['cavity_offset_hz'] / 1e3:+.2f} kHz)")
            run_dir = out / name
            wall = time.monotonic()
            # Each stage's folder has its lock too: a resume of it meanwhile is refused.
            with hold_run_folder(run_dir, "dry-run"):
                prepared = runner.prepare(name, rig, config, run_dir, store=store, stop=stop)
                handler = _log_to_run_folder(run_dir)
                try:
                    with _progress_display(ns) as progress:
                        result = runner.execute(prepared, rig, stop=stop, progress=progress,
                                                extra={"dry_run": {"endpoint": endpoint, **thermal}})
                finally:
                    logging.getLogger().removeHandler(handler)
                    handler.close()
            result["truth"] = _truth_block(rig, result["setpoints"])
            write_json_atomic(run_dir / RESULT_NAME, result)
            rows.append((name, result, time.monotonic() - wall))
            print(_summary(result))
            if not result["accepted"]:
                exit_code = EXIT_BELOW_ACCEPTANCE
    print()
    print(_truth_table(rows))
    print(f"\nrun folders under {out}")
    return exit_code


def _truth_table(rows: Sequence[tuple[str, dict[str, Any], float]]) -> str:
    header = (f"{'stage':<10} {'status':<17} {'measured':>9} {'true@chosen':>11} "
              f"{'true best':>9} {'ratio':>6} {'points':>6} {'shots':>9} {'rig time':>9} "
              f"{'wall':>7}")
    lines = [header, "-" * len(header)]
    for name, result, wall in rows:
        truth = result["truth"]
        ratio = truth["inversion_at_chosen"] / truth["best_inversion"]
        lines.append(
            f"{name:<10} {result['status']:<17} {result['inversion']:>9.3f} "
            f"{truth['inversion_at_chosen']:>11.3f} {truth['best_inversion']:>9.3f} "
            f"{ratio:>6.3f} {result['points']:>6d} {result['shots']:>9d} "
            f"{result['rig_time_s'] / 60:>7.1f} m {wall:>6.1f}s")
    for name, result, _ in rows:
        best = result["truth"]["best_setpoints"]
        lines.append(f"{name}: chosen {setpoints_text(result['setpoints'])}; "
                     f"true best {setpoints_text(best)}")
    return "\n".join(lines)


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
    if "inversion" in result:
        low, high = result["inversion_interval"]
        text += (f"; last measurement: inversion {result['inversion']:.3f} [{low:.3f}, "
                 f"{high:.3f}], phase shift {result['phase_shift_rad'] / 3.141592653589793:.3f} pi")
    return text


def _cmd_track(ns: argparse.Namespace) -> int:
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


def _cmd_report(ns: argparse.Namespace) -> int:
    from autotune import report

    def body() -> int:
        text = report.write_report(Path(ns.run_dir), plot=not ns.no_plot,
                                   out=Path(ns.out) if ns.out is not None else None)
        print(text)
        return EXIT_OK

    return _guarded(body)


# -- parser ------------------------------------------------------------------------------

def _at_least_one(text: str) -> int:
    value = int(text)
    if not 1 <= value <= 10_000_000:
        raise argparse.ArgumentTypeError(f"expected an integer from 1 to 10000000 (the most "
                                         f"shots per phase a config takes), got {text!r}")
    return value


def _positive_seconds(text: str) -> float:
    value = float(text)
    if not (value > 0.0 and value <= SERVER_TIMEOUT_S):
        raise argparse.ArgumentTypeError(f"expected a number of seconds > 0 and at most "
                                         f"{SERVER_TIMEOUT_S:g} (an hour), got {text!r}")
    return value


def _seed(text: str) -> int:
    """A seed flag: an integer the configs take as a seed (``[search] seed``)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an integer, got {text!r}") from None
    if not 0 <= value <= SEED_MAX:
        raise argparse.ArgumentTypeError(f"expected an integer from 0 to {SEED_MAX} (a seed, "
                                         f"as [search] seed), got {text!r}")
    return value


def _physical(spec: Plausible) -> Callable[[str], float]:
    """A flag holding a physical value: a finite number within the range a lab could mean of
    its kind (autotune.plausible), refused with a hint at a slipped unit."""
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number in {spec.unit}, got "
                                             f"{text!r}") from None
        if not math.isfinite(value):
            raise argparse.ArgumentTypeError(f"expected a finite number in {spec.unit}, got "
                                             f"{text!r}")
        if (found := spec.problem(value)) is not None:
            expected, hint = found
            raise argparse.ArgumentTypeError(f"expected {expected}, got {text}"
                                             + (f": {hint}" if hint else ""))
        return value
    return parse


def _non_negative_seconds(text: str) -> float:
    value = float(text)
    if not (value >= 0.0 and value < float("inf")):
        raise argparse.ArgumentTypeError(f"expected a finite number of seconds >= 0, got {text!r}")
    return value


class _Parser(argparse.ArgumentParser):
    """argparse's parser, whose refusal of an unknown command or choice names the nearest one."""

    def error(self, message: str) -> Any:
        found = re.search(r"invalid choice: '([^']*)' \(choose from (.*)\)", message)
        if found:
            choices = re.findall(r"'([^']*)'", found.group(2))
            near = difflib.get_close_matches(found.group(1), choices, n=1, cutoff=0.6)
            if near:
                message += f"; did you mean '{near[0]}'?"
        return super().error(message)


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="autotune",
        description="Closed-loop calibration of a Ramsey-cavity single-photon detector. "
                    "calibrate, retune, track, serve and probe act on a real rig: their --help "
                    "carries the caution (the lab's interlocks and safety rules come first); "
                    "rig, dry-run and report touch no hardware.",
    )
    parser.add_argument("--version", action="version", version=f"autotune {__version__}")
    _add_output_options(parser, log_level=True, default=None)
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    rig = sub.add_parser("rig", help="serve the bundled simulated rig over the bus",
                         description="Serve the bundled simulated rig (no hardware) over the bus "
                                     "until SIGINT/SIGTERM. Exit 0 after a clean stop, 1 if the "
                                     "endpoint cannot be bound, 2 for a bad configuration, flag "
                                     "or key file.")
    rig.add_argument("--config", type=Path, default=_SIM_RIG_CONFIG,
                     help="simulated rig TOML (default: the packaged copy of "
                          "configs/sim-rig.toml)")
    _add_server_arguments(rig, bind_default="tcp://127.0.0.1:5560")
    rig.add_argument("--seed", type=_seed, default=None,
                     help="seed of the rig's noise and of the faults (default: the config's "
                          "rig.default_seed)")
    faults = rig.add_argument_group("fault injection (to test clients)")
    faults.add_argument("--drop-probability", type=float, default=None,
                        help="probability of dropping a reply")
    faults.add_argument("--delay-s", type=float, default=None, help="delay of each fresh reply, s")
    faults.add_argument("--corrupt-probability", type=float, default=None,
                        help="probability of corrupting a reply")
    faults.add_argument("--exit-after", type=int, default=None,
                        help="stop after N messages (0: never)")
    rig.set_defaults(handler=_cmd_rig)

    serve = sub.add_parser("serve", help="serve a lab's rig driver over the bus (acts on hardware)",
                           description="Serve the rig driver named in DRIVER.toml over the bus "
                                       "until SIGINT/SIGTERM. " + CAUTION + " Exit 0 after a clean "
                                       "stop, 1 if the endpoint cannot be bound, 2 for a bad "
                                       "DRIVER.toml, flag, key file or driver class, 3 if the "
                                       "driver fails while starting.")
    serve.add_argument("--config", type=Path, required=True, help="the DRIVER.toml to serve")
    _add_server_arguments(serve, bind_default=None)
    serve.set_defaults(handler=_cmd_serve)

    probe = sub.add_parser("probe", help="check a rig server against the wire protocol "
                                         "(moves the rig, after asking)",
                           description="Check the rig server at ENDPOINT against the wire "
                                       "protocol, one line per rule. Moves a rig that is not "
                                       "simulated only after asking (or with --yes); with no "
                                       "terminal and no --yes it does not move it. " + CAUTION
                                       + " Exit 0 when every rule passes, 1 when a rule fails, "
                                       "2 for bad input, 3 if the rig does not answer, 5 when "
                                       "some rules were not run, 130 on SIGINT.")
    probe.add_argument("endpoint", metavar="ENDPOINT", help="the rig server, e.g. tcp://127.0.0.1:5560")
    probe.add_argument("--yes", action="store_true",
                       help="move the rig without asking (the rules that move it stay within "
                            "the described limits and steps)")
    probe.add_argument("--timeout-s", type=_positive_seconds, default=10.0,
                       help="longest wait for one reply, s (default 10; an acquisition must fit)")
    probe.add_argument("--shots", type=_at_least_one, default=20,
                       help="shots per acquisition (default 20)")
    probe.add_argument("--curve-client-secret-key", type=Path, default=None,
                       help="this client's CURVE secret key file (zmq.auth .key_secret)")
    probe.add_argument("--curve-server-public-key", type=Path, default=None,
                       help="the rig server's CURVE public key file (.key)")
    probe.set_defaults(handler=_cmd_probe)

    for name, text in (("calibrate", "full calibration of a rig (acts on hardware)"),
                       ("retune", "check the last good setting and retune if needed "
                                  "(acts on hardware)")):
        p = sub.add_parser(name, help=text, description=text + ". " + CAUTION + _STAGE_EXITS)
        p.add_argument("--config", required=True, help="calibrate/retune TOML file")
        group = p.add_mutually_exclusive_group()
        group.add_argument("--out", help="new run folder (default runs/<command>-<UTC time>)")
        group.add_argument("--resume", metavar="RUN_DIR", help="continue a killed run")
        _add_wait_lease(p)
        p.set_defaults(handler=lambda ns, n=name: _cmd_stage(ns, n))

    dry = sub.add_parser("dry-run", help="calibrate and retune the bundled simulated rig and "
                                         "compare with its truth",
                         description="Start the bundled simulated rig (no hardware), calibrate "
                                     "it, apply a thermal step to its cavity, retune, and compare "
                                     "each stage's choice with the simulator's truth; one run "
                                     "folder per stage under --out, then 'autotune report' on "
                                     "that folder. Exit 0 when both stages are accepted, 4 when "
                                     "one is below min_inversion, 2 for bad input, 3 if the "
                                     "simulated rig fails, 130 on SIGINT.")
    dry.add_argument("--config", help="calibrate/retune TOML (default: the packaged copy of "
                                       "configs/dry-run.toml)")
    dry.add_argument("--rig-config", help="simulated rig TOML (default: the packaged copy of "
                                           "configs/sim-rig.toml)")
    dry.add_argument("--seed", type=_seed, help="seed of the rig and the search")
    dry.add_argument("--out", help="folder for the stages' run folders")
    dry.add_argument("--thermal-step-hz", type=_physical(THERMAL_STEP_HZ), default=15e3,
                     help="cavity frequency step before the retune (Hz, default 15000)")
    dry.add_argument("--no-retune", action="store_true", help="stop after the calibration")
    dry.set_defaults(handler=_cmd_dry_run)

    track_text = ("hold the 2π condition through the night: checks at a planned cadence, a lock "
                  "on the photon phase shift, a sequential test for when to retune; one run "
                  "folder for the night (acts on hardware)")
    track = sub.add_parser("track", help=track_text, description=track_text + ". " + CAUTION +
                           " Exit 0 when the night reached its end, 4 when it stopped after "
                           "[track] max_consecutive_failures failed recoveries, 130 on "
                           "SIGINT/SIGTERM (continue with the printed --resume command).")
    track.add_argument("--config", required=True, help="calibrate/retune TOML file with [track]")
    track_out = track.add_mutually_exclusive_group()
    track_out.add_argument("--out", help="new run folder (default runs/track-<UTC time>)")
    track_out.add_argument("--resume", metavar="TRACK_DIR",
                           help="continue a stopped night from its journal")
    _add_wait_lease(track)
    # Options of the schedule-based track this command replaced: refused with a message.
    track.add_argument("--interval-s", default=None, help=argparse.SUPPRESS)
    track.add_argument("--cycles", default=None, help=argparse.SUPPRESS)
    track.set_defaults(handler=_cmd_track)

    rep = sub.add_parser("report", help="morning report of a run, dry-run or track folder: "
                                        "figures, report.html and a text summary (reads only)",
                         description="Read a run folder, a dry run's folder or a track folder "
                                     "(never a rig) and print what to look at first and each "
                                     "run's summary; write its figures, an overview report.png "
                                     "and a self-contained report.html (images inline) next to "
                                     "the runs or under --out. A run still being written (its "
                                     "holder named) and a damaged journal (shown up to its "
                                     "damaged line) are said first, on the terminal and at the "
                                     "top of the page. Exit 0, or 2 when the folder is not a "
                                     "run folder or its manifest or result file is damaged.")
    rep.add_argument("run_dir", help="a run folder, a dry run's folder or a track folder")
    rep.add_argument("--no-plot", action="store_true", help="text summary only")
    rep.add_argument("--out", metavar="DIR",
                     help="folder for the figures and report.html (default RUN_DIR)")
    rep.set_defaults(handler=_cmd_report)
    # Accepted after the command too (`autotune calibrate --config F --quiet`); rig and serve
    # have their own --log-level (their JSON lines).
    for name, command in sub.choices.items():
        _add_output_options(command, log_level=name not in ("rig", "serve"),
                            default=argparse.SUPPRESS,
                            run_folder=name in ("calibrate", "retune", "track", "dry-run"))
    return parser


def _add_wait_lease(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--wait-lease-s", type=_non_negative_seconds, default=0.0,
                        metavar="SECONDS",
                        help="when another client holds the rig's lease, wait up to SECONDS for "
                             "it to be released or to run out (default 0: exit 3 at once, "
                             "naming the holder)")


def _add_output_options(parser: argparse.ArgumentParser, *, log_level: bool,
                        default: Any, run_folder: bool = True) -> None:
    if log_level:
        parser.add_argument("--log-level", default=default,
                            choices=["debug", "info", "warning", "error"],
                            help="terminal log level (default: info; warning with --quiet)"
                                 + ("; the run folder's log.jsonl keeps every level"
                                    if run_folder else ""))
    parser.add_argument("--quiet", action="store_true",
                        default=False if default is None else default,
                        help=("no progress line, and only" if run_folder else "only")
                        + " warnings and errors in the log; results are still printed")


def _console_level(ns: argparse.Namespace) -> str:
    """The terminal log level: --log-level if given, else warning with --quiet, else info."""
    return ns.log_level or ("warning" if ns.quiet else "info")


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``autotune`` console script; returns the exit code."""
    parser = _parser()
    ns = parser.parse_args(argv)
    if getattr(ns, "command", None) not in ("rig", "serve"):
        _configure_logging(_console_level(ns) if ns.command != "probe" or ns.log_level
                           else "warning")
    return int(ns.handler(ns))


if __name__ == "__main__":
    sys.exit(main())
