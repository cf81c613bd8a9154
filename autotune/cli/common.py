"""What every command shares: the exit codes, the caution, stopping on a signal, connecting to
and claiming a rig, and turning errors into exit codes."""

from __future__ import annotations

import os
import signal
import sys
import textwrap
import threading
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

import structlog

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

if TYPE_CHECKING:  # the run config is imported by the commands that read one, not by rig
    from autotune.config import RunConfig


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
STAGE_EXITS = (" Exit 0 when the verified setting is accepted (or the checked one still good), "
                "4 when its inversion is below min_inversion (the rig is left there), 2 for bad "
                "input (config, flags, run folder), 3 when the rig does not answer or refuses, "
                "130 on SIGINT/SIGTERM (continue with the printed --resume command), 1 for an "
                "internal error.")

_log = structlog.get_logger("autotune.cli")


# -- signals -----------------------------------------------------------------------------

def install_stop_handlers(at_once: Callable[[], str] = lambda: "") -> threading.Event:
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

def default_run_dir(command: str) -> Path:
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    return Path("runs") / f"{command}-{stamp}"


def connect(config: RunConfig, stop: threading.Event | None = None) -> Any:
    from autotune.run.guard import configured_limit
    from autotune.wire.bus import BusClient, CurveClientKeys

    curve = None
    if config.bus.curve is not None:
        curve = CurveClientKeys.load(config.bus.curve.client_secret_key_file,
                                     config.bus.curve.server_public_key_file)
    limits = {sp.name: configured_limit(sp) for sp in config.setpoints}
    return BusClient(config.bus.endpoint, timeout_s=config.bus.timeout_s,
                     retries=config.bus.retries, backoff_s=config.bus.backoff_s, curve=curve,
                     limits=limits, source=config.source, stop=stop,
                     stop_safe_s=config.recovery.safe_on_stop_s)


def claim_rig(rig: Any, command: str, wait_s: float, config: RunConfig,
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


def guarded(action: Callable[[], int], resume_hint: Callable[[], str | None] = lambda: None
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
