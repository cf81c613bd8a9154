"""The commands of the rig's side: ``rig`` (the bundled simulated rig), ``serve`` (a lab's
driver behind the protocol) and ``probe`` (a rig server checked rule by rule)."""

from __future__ import annotations

import argparse
import logging
import os
import signal
import sys
import threading
import time
from pathlib import Path
from typing import Any

import structlog

from autotune.packaged import packaged_config
from autotune.errors import (
    ConfigError,
)
from autotune.run.display import progress_mode
from autotune.cli.common import CAUTION, EXIT_BAD_INPUT, EXIT_INTERRUPTED, EXIT_OK, EXIT_RIG
from autotune.cli.console import console_level


# -- rig, serve, probe: serving rigs and checking them --------------------------------------

EXIT_PROBE_FAILED = 1
EXIT_PROBE_INCOMPLETE = 5
SIM_RIG_CONFIG = packaged_config("sim-rig.toml")


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


def add_server_arguments(parser: argparse.ArgumentParser, *, bind_default: str | None) -> None:
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


def cmd_rig(ns: argparse.Namespace) -> int:
    # The simulated rig is imported only by the commands that serve or start it.
    from autotune.kit.served import ServedDriver
    from autotune.kit.server import FaultConfig
    from drivers_sim.config import load_sim_config
    from drivers_sim.driver import SimulatedDriver
    from drivers_sim.rig import SimulatedRig

    _configure_server_logging(ns.server_log_level or console_level(ns))
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


def cmd_serve(ns: argparse.Namespace) -> int:
    from autotune.kit.driver_config import load_driver_config
    from autotune.kit.server import FaultConfig

    _configure_server_logging(ns.server_log_level or console_level(ns))
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
    :class:`~autotune.kit.served.ServedDriver`, or the exit status when it cannot start (2 for a
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


def cmd_probe(ns: argparse.Namespace) -> int:
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
