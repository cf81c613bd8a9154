"""Serve a rig over :mod:`autotune.wire.protocol` on a ZeroMQ ROUTER socket.

:class:`RigServer` is the protocol's transport for any object with the protocol's operations,
in practice a lab's driver behind :class:`autotune.kit.served.ServedDriver` (``autotune serve``)
or the bundled simulated rig's driver (``autotune rig``). It answers every request, valid or
not, with one reply; bad input never stops it. A request repeated with a ``msg_id`` it has
answered gets the cached reply bytes and is not executed again (bounded LRU cache); replies of
kind ``busy`` and ``interlock`` are never kept, so the same request sent again once the rig is
free is executed, nor are ``internal`` replies to a request whose execution failed, so that a
retry reaches the driver again (an ``internal`` reply to a request that ran, its result
unreadable, is kept: see :func:`mark_ran`). Errors a driver raises from the vocabulary of :mod:`autotune.driver` become
their error kinds; any other exception, ``BaseException`` included (``SystemExit``,
``KeyboardInterrupt``, ``GeneratorExit``), is ``internal`` and the server keeps serving. Every
result of ``describe``, ``status``, ``apply``, ``acquire`` and ``safe`` carries the server's
``instance``, new at each start. The protocol's lease (*One driver at a time*) is kept here, in a
:class:`autotune.kit.lease.LeaseBook`: ``claim`` and ``release`` are answered by the server, an
op another client's lease reserves is refused ``leased`` without reaching the rig, and every
``safe`` is logged with its sender. Faults can be injected to test clients: dropped, delayed and corrupted replies, and an
exit after a number of messages. Optional CURVE encryption admits only clients whose public
key is in an allowed folder; others get nothing and are logged.

:class:`LocalRig` speaks to such an object in this process through the same encoder, request
handler and parsers, without a socket (benchmark studies).
"""

from __future__ import annotations

import collections
import hashlib
import heapq
import ipaddress
import itertools
import json
import math
import os
import random
import re
import secrets
import time
import types
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import structlog
import zmq
import zmq.auth
from zmq.auth.thread import ThreadAuthenticator
from zmq.utils.monitor import recv_monitor_message

from autotune.wire import protocol
from autotune.errors import ConfigError, DriverRefusal
from autotune.schema import is_number
from autotune.kit.lease import LeaseBook, LeaseHeld
from autotune.wire.protocol import Acquisition, Applied, Description, ErrorKind, Op, RequestRejected, Status

__all__ = [
    "DEFAULT_BIND",
    "FaultConfig",
    "CurveServerKeys",
    "RigServer",
    "LocalRig",
    "write_ready_file",
    "mark_ran",
    "request_ran",
]

_log = structlog.get_logger(__name__)

DEFAULT_BIND = "tcp://127.0.0.1:5560"
"""Where the server listens unless told otherwise: loopback only."""

_POLL_MS = 100  # the longest the loop sleeps before it looks at the stop flag again
_BATCH = 64  # messages taken per wake-up before due replies are sent
# Refusals never replayed: nothing was done. An internal reply is kept only for a request that
# ran (mark_ran).
_NOT_KEPT = frozenset({ErrorKind.BUSY, ErrorKind.INTERLOCK, ErrorKind.LEASED})
_RAN_ATTRIBUTE = "autotune_request_ran"


def mark_ran(exc: BaseException) -> BaseException:
    """Mark ``exc`` as raised after the rig acted on the request (a read-back or a result check
    failed once the driver's call returned): its ``internal`` reply is kept in the replay cache,
    so the request is never run twice. Returns ``exc``."""
    try:
        setattr(exc, _RAN_ATTRIBUTE, True)
    except AttributeError:  # an exception without a __dict__ cannot carry the mark
        pass
    return exc


def request_ran(exc: BaseException) -> bool:
    """True if ``exc`` was marked by :func:`mark_ran`."""
    return bool(getattr(exc, _RAN_ATTRIBUTE, False))
_INSTANCE_RE = re.compile(r"[0-9A-Za-z_-]{1,64}")
_HANDSHAKE_EVENTS = (
    zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL | zmq.EVENT_HANDSHAKE_FAILED_AUTH
)


# --------------------------------------------------------------------------- faults


@dataclass(frozen=True)
class FaultConfig:
    """Faults the server injects into its replies, to test clients.

    Attributes
    ----------
    drop_reply_probability : float
        Probability that a reply is not sent (the request was executed and its reply cached).
    delay_reply_s : float
        Delay before a freshly executed reply is sent, s; replays from the cache go at once,
        as from a rig that was slow to execute but has the answer when asked again.
    corrupt_reply_probability : float
        Probability that a reply is sent truncated and ending in an invalid UTF-8 byte, so that
        a client always detects it.
    exit_after_messages : int
        Stop after this many received messages have been answered (0: never).
    """

    drop_reply_probability: float = 0.0
    delay_reply_s: float = 0.0
    corrupt_reply_probability: float = 0.0
    exit_after_messages: int = 0

    def __post_init__(self) -> None:
        for key in ("drop_reply_probability", "corrupt_reply_probability"):
            value = getattr(self, key)
            if not is_number(value) or not 0.0 <= value <= 1.0:
                raise ConfigError("<memory>", key, "a probability in [0, 1]", value)
        delay = self.delay_reply_s
        if not is_number(delay) or not (math.isfinite(delay) and 0 <= delay <= 600.0):
            raise ConfigError("<memory>", "delay_reply_s", "a number of seconds from 0 to 600 "
                              "(the longest reply wait a client takes, bus.timeout_s)", delay)
        value = self.exit_after_messages
        if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value <= 10**9:
            raise ConfigError("<memory>", "exit_after_messages", "an integer from 0 to 1e9 "
                              "(0: never)", value)

    @classmethod
    def from_table(cls, table: Mapping[str, Any] | None, *, file: str = "<memory>") -> FaultConfig:
        """Validate a ``[faults]`` table (missing keys take the no-fault defaults).

        Raises
        ------
        ConfigError
            For an unknown key or a bad value, naming ``faults.<key>``.
        """
        if table is None:
            return cls()
        if not isinstance(table, Mapping):
            raise ConfigError(file, "faults", "a table", table)
        known = set(cls.__dataclass_fields__)
        for key in table:
            if key not in known:
                raise ConfigError(file, f"faults.{key}", f"one of {', '.join(sorted(known))}", key)
        try:
            return cls(**table)
        except ConfigError as exc:
            raise ConfigError(file, f"faults.{exc.key}", exc.expected, exc.got) from None

    def overridden(self, **values: Any) -> FaultConfig:
        """Return a copy with the given fields replaced where the value is not None."""
        changes = {k: v for k, v in values.items() if v is not None}
        try:
            return replace(self, **changes)
        except ConfigError as exc:
            raise ConfigError("<flags>", exc.key, exc.expected, exc.got) from exc


# --------------------------------------------------------------------------- CURVE


@dataclass(frozen=True, repr=False)
class CurveServerKeys:
    """The server's CURVE key pair and the public keys of the clients it admits (Z85 bytes)."""

    public: bytes
    secret: bytes
    allowed: frozenset[bytes]

    def __repr__(self) -> str:
        return f"CurveServerKeys(public={self.public!r}, secret=<hidden>, allowed={len(self.allowed)} keys)"

    @classmethod
    def load(cls, secret_file: str | Path, allowed_dir: str | Path) -> CurveServerKeys:
        """Load the server's ``.key_secret`` file and every ``*.key`` file of ``allowed_dir``.

        Raises
        ------
        ConfigError
            If a file cannot be read, lacks its secret key, or the folder holds no public key.
            There is no fallback to plain text.
        """
        try:
            public, secret = zmq.auth.load_certificate(secret_file)
        except (OSError, ValueError) as exc:
            raise ConfigError(str(secret_file), "curve_secret_key", "a readable ZeroMQ certificate", f"{type(exc).__name__}: {exc}") from exc
        if secret is None:
            raise ConfigError(str(secret_file), "curve_secret_key", "a certificate with a secret key", "a public-only certificate")
        folder = Path(allowed_dir)
        if not folder.is_dir():
            raise ConfigError(str(folder), "curve_allowed_dir", "a folder of client public keys (*.key)", "no such folder")
        try:
            allowed = frozenset(zmq.auth.load_certificates(folder))
        except (OSError, ValueError) as exc:
            raise ConfigError(str(folder), "curve_allowed_dir", "readable certificates", f"{type(exc).__name__}: {exc}") from exc
        if not allowed:
            raise ConfigError(str(folder), "curve_allowed_dir", "at least one client public key (*.key)", "none")
        return cls(public=public, secret=secret, allowed=allowed)


class _AllowedKeys:
    """Credentials provider for pyzmq's authenticator: admit listed keys, log the others."""

    def __init__(self, allowed: frozenset[bytes], log: Any) -> None:
        self._allowed = allowed
        self._log = log

    def callback(self, domain: str, key: bytes) -> bool:
        if key in self._allowed:
            return True
        self._log.warning("curve_client_refused", reason="public key not in the allowed folder",
                          client_key=key.decode("ascii", "replace"), domain=domain)
        return False


# --------------------------------------------------------------------------- the server


class RigServer:
    """A rig served over ZeroMQ.

    Parameters
    ----------
    rig : object
        The rig: methods ``describe``, ``apply``, ``acquire``, ``status``, ``safe`` returning
        the protocol's JSON-ready result dicts and raising the refusals of
        :mod:`autotune.driver` (usually an :class:`autotune.kit.served.ServedDriver`); the
        simulated-only ``truth``, ``advance`` and ``thermal_step`` are served where it has
        them, and answered ``unknown_op`` where it has not.
    bind : str
        Endpoint to bind, e.g. ``"tcp://127.0.0.1:5560"``; port ``0`` or ``*`` picks a free one
        (see :attr:`endpoint` after :meth:`start`).
    faults : FaultConfig
        Faults to inject (``FaultConfig()`` for none).
    curve : CurveServerKeys, optional
        Encrypt and admit only the allowed client keys.
    cache_size : int
        Replies kept for repeated msg_ids (LRU), >= 1.
    fault_seed : int
        Seed of the fault generator.
    context : zmq.Context, optional
        Context for the sockets; by default the server owns a new one.
    instance : str, optional
        The rig identity reported as ``instance`` in the results of ``describe``, ``status``,
        ``apply``, ``acquire`` and ``safe`` (default: 16 random hex characters, new for every
        server, so a restarted rig is recognised as such).
    """

    def __init__(
        self,
        rig: Any,
        bind: str,
        *,
        faults: FaultConfig,
        curve: CurveServerKeys | None = None,
        cache_size: int = 1024,
        fault_seed: int = 0,
        context: zmq.Context | None = None,
        instance: str | None = None,
    ) -> None:
        if not isinstance(bind, str) or "://" not in bind:
            raise ConfigError("<arguments>", "bind", "an endpoint such as 'tcp://127.0.0.1:5560'", bind)
        if not isinstance(faults, FaultConfig):
            raise ConfigError("<arguments>", "faults", "a FaultConfig", faults)
        if isinstance(cache_size, bool) or not isinstance(cache_size, int) or cache_size < 1:
            raise ConfigError("<arguments>", "cache_size", "an integer >= 1", cache_size)
        self._instance = instance if instance is not None else secrets.token_hex(8)
        if not isinstance(self._instance, str) or not _INSTANCE_RE.fullmatch(self._instance):
            raise ConfigError("<arguments>", "instance", "1 to 64 characters of [0-9A-Za-z_-]",
                                    instance)
        self._rig = rig
        self._bind = _wildcard_port(bind)
        self._faults = faults
        self._curve = curve
        self._cache: collections.OrderedDict[str, tuple[bytes, bytes]] = collections.OrderedDict()
        self._cache_size = cache_size
        self._random = random.Random(fault_seed)
        self._own_context = context is None
        self._context = context
        self._socket: zmq.Socket | None = None
        self._monitor: zmq.Socket | None = None
        self._auth: ThreadAuthenticator | None = None
        self._endpoint: str | None = None
        self._pending: list[tuple[float, int, list[bytes]]] = []
        self._sequence = itertools.count()
        self._received = 0
        self._stopping = False
        self._log = _log.bind(bind=bind)
        dispatch: dict[Op, Callable[[Mapping[str, Any]], Mapping[str, Any]]] = {
            Op.DESCRIBE: lambda a: self._identified(rig.describe()),
            Op.APPLY: lambda a: self._identified(rig.apply(dict(a["setpoints"]))),
            Op.ACQUIRE: lambda a: self._identified(rig.acquire(a["field"], a["ramsey_phase"], a["shots"])),
            Op.STATUS: lambda a: self._identified(rig.status()),
            Op.SAFE: lambda a: self._identified(rig.safe()),
        }
        # The simulated-only ops exist only where the rig has them; a real rig answers unknown_op.
        if callable(getattr(rig, "truth", None)):
            dispatch[Op.TRUTH] = lambda a: rig.truth(dict(a["setpoints"]) if "setpoints" in a else None)
        if callable(getattr(rig, "advance", None)):
            dispatch[Op.ADVANCE] = lambda a: rig.advance(a["seconds"])
        if callable(getattr(rig, "thermal_step", None)):
            dispatch[Op.THERMAL_STEP] = lambda a: rig.thermal_step(a["shift_hz"])
        self._leases = LeaseBook()
        self._sender: str | None = None  # the client of the request being executed
        # A request of the lease's holder renews the lease when it ends: a long acquisition
        # (or a slow driver) cannot let the lease run out under the client that waits for it.
        self._dispatch = types.MappingProxyType(
            {op: self._renewing(handler) for op, handler in dispatch.items()})

    # ------------------------------------------------------------------ lifecycle

    def __enter__(self) -> RigServer:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    @property
    def instance(self) -> str:
        """The rig identity this server reports (new for every server)."""
        return self._instance

    def _identified(self, result: Mapping[str, Any]) -> dict[str, Any]:
        return {**result, "instance": self._instance}

    @property
    def endpoint(self) -> str | None:
        """The endpoint actually bound (port resolved), or None before :meth:`start`."""
        return self._endpoint

    def start(self) -> str:
        """Bind the socket (starting the CURVE authenticator first) and return the endpoint.

        Raises
        ------
        zmq.ZMQError
            If the endpoint cannot be bound (in use, not an address of this host).
        """
        if self._context is None:
            self._context = zmq.Context()
        socket = self._context.socket(zmq.ROUTER)
        socket.setsockopt(zmq.LINGER, 0)
        # Refuse absurd frames at the transport; anything above the protocol's limit but below
        # this still gets a proper bad_request reply.
        socket.setsockopt(zmq.MAXMSGSIZE, 4 * protocol.MAX_MESSAGE_BYTES)
        socket.setsockopt(zmq.RCVTIMEO, _POLL_MS)
        self._socket = socket
        if self._curve is not None:
            # The authenticator must run before the socket binds, or clients slip past it.
            self._auth = ThreadAuthenticator(self._context)
            self._auth.start()
            self._auth.configure_curve_callback(domain="*", credentials_provider=_AllowedKeys(self._curve.allowed, self._log))
            socket.curve_secretkey = self._curve.secret
            socket.curve_publickey = self._curve.public
            socket.curve_server = True
            self._monitor = socket.get_monitor_socket(_HANDSHAKE_EVENTS)
        socket.bind(self._bind)
        endpoint = socket.getsockopt_string(zmq.LAST_ENDPOINT)
        self._endpoint = endpoint
        if not _is_loopback(endpoint):
            self._log.warning("server_not_loopback", endpoint=endpoint, reason="bound beyond loopback as asked")
        self._log.info("server_listening", endpoint=endpoint, curve=self._curve is not None,
                       faults={k: getattr(self._faults, k) for k in FaultConfig.__dataclass_fields__})
        return endpoint

    def stop(self) -> None:
        """Ask :meth:`serve` to return at its next wake-up (safe from a signal handler)."""
        self._stopping = True

    def close(self) -> None:
        """Close sockets, stop the authenticator and end an owned context. Safe to call twice."""
        if self._monitor is not None and self._socket is not None:
            try:
                self._socket.disable_monitor()
            except zmq.ZMQError:
                pass
        if self._monitor is not None:
            self._monitor.close(linger=0)
            self._monitor = None
        if self._socket is not None:
            self._socket.close(linger=0)
            self._socket = None
        if self._auth is not None:
            self._auth.stop()
            self._auth = None
        if self._own_context and self._context is not None and not self._context.closed:
            self._context.term()

    # ------------------------------------------------------------------ the loop

    def serve(self) -> None:
        """Answer requests until :meth:`stop` is called or the exit fault fires."""
        if self._socket is None:
            raise RuntimeError("RigServer.serve: call start() first")
        poller = zmq.Poller()
        poller.register(self._socket, zmq.POLLIN)
        if self._monitor is not None:
            poller.register(self._monitor, zmq.POLLIN)
        limit = self._faults.exit_after_messages
        socket = self._socket
        while not self._stopping:
            if limit and self._received >= limit:
                if not self._pending:
                    self._log.warning("fault_exit", messages=self._received, reason="exit_after_messages reached")
                    return
                time.sleep(max(0.0, min(_POLL_MS / 1000, self._pending[0][0] - time.monotonic())))
            elif self._pending or self._monitor is not None:
                timeout_ms = _POLL_MS
                if self._pending:
                    timeout_ms = min(timeout_ms, max(0, math.ceil((self._pending[0][0] - time.monotonic()) * 1000)))
                events = dict(poller.poll(timeout_ms))
                if self._monitor is not None and self._monitor in events:
                    self._drain_monitor()
                for _ in range(_BATCH if socket in events else 0):
                    try:
                        frames = socket.recv_multipart(zmq.NOBLOCK)
                    except zmq.Again:
                        break
                    self._received += 1
                    self._on_message(frames)
                    if limit and self._received >= limit:
                        break
            else:
                # Nothing else to watch: a receive bounded by RCVTIMEO is the cheapest wait.
                try:
                    frames = socket.recv_multipart()
                except zmq.Again:
                    continue
                self._received += 1
                self._on_message(frames)
            self._send_due()
        self._log.info("server_stopping", messages=self._received)

    def _on_message(self, frames: list[bytes]) -> None:
        try:
            split = frames.index(b"")
            envelope, body = frames[: split + 1], frames[split + 1 :]
        except ValueError:
            # A DEALER peer without the REQ delimiter: reply to its identity alone.
            envelope, body = frames[:1], frames[1:]
        if len(body) != 1:
            reply = protocol.encode_error("", ErrorKind.BAD_REQUEST, f"message: expected one frame of JSON, got {len(body)}")
            replayed = False
        else:
            reply, replayed = self._handle(body[0])
        delay = 0.0 if replayed else self._faults.delay_reply_s
        if delay > 0.0:
            heapq.heappush(self._pending, (time.monotonic() + delay, next(self._sequence), envelope + [reply]))
        else:
            self._send(envelope + [reply])

    def _send_due(self) -> None:
        now = time.monotonic()
        while self._pending and self._pending[0][0] <= now:
            self._send(heapq.heappop(self._pending)[2])

    def _send(self, frames: list[bytes]) -> None:
        """Send one reply, through the drop and corrupt faults."""
        if self._random.random() < self._faults.drop_reply_probability:
            self._log.info("fault_drop_reply")
            return
        if self._random.random() < self._faults.corrupt_reply_probability:
            reply = frames[-1]
            frames = frames[:-1] + [reply[: self._random.randrange(len(reply))] + b"\xff"]
            self._log.info("fault_corrupt_reply")
        try:
            self._socket.send_multipart(frames, zmq.NOBLOCK)  # type: ignore[union-attr]
        except zmq.ZMQError as exc:
            # The peer is gone or full; the client will retry and get the cached reply.
            self._log.info("reply_not_sent", error=str(exc))

    def _drain_monitor(self) -> None:
        assert self._monitor is not None
        while True:
            try:
                event = recv_monitor_message(self._monitor, zmq.NOBLOCK)
            except zmq.Again:
                return
            try:
                name = zmq.Event(event["event"]).name
            except ValueError:
                name = str(event["event"])
            self._log.warning("curve_handshake_refused", zmq_event=str(name), value=event["value"],
                              peer=event["endpoint"].decode("ascii", "replace") if isinstance(event["endpoint"], bytes) else str(event["endpoint"]))

    # ------------------------------------------------------------------ requests

    def handle(self, payload: bytes) -> bytes:
        """Answer one request frame (from the cache for a repeated msg_id); never raises."""
        return self._handle(payload)[0]

    def _handle(self, payload: bytes) -> tuple[bytes, bool]:
        try:
            request = protocol.decode_request(payload)
        except RequestRejected as exc:
            self._log.info("request_rejected", kind=exc.kind.value, detail=exc.detail, msg_id=exc.msg_id)
            reply = protocol.encode_error(exc.msg_id, exc.kind, exc.detail)
            if exc.msg_id:
                self._remember(exc.msg_id, _digest(payload), reply)
            return reply, False
        digest = _request_digest(request)
        cached = self._cache.get(request.msg_id)
        if cached is not None:
            if cached[0] != digest:
                detail = f"msg_id: {request.msg_id} was already used for another request; expected a fresh msg_id"
                return protocol.encode_error(request.msg_id, ErrorKind.BAD_REQUEST, detail), False
            self._cache.move_to_end(request.msg_id)
            self._log.info("request_replayed", op=request.op.value, msg_id=request.msg_id)
            return cached[1], True
        reply, kept = self._execute(request)
        # busy and interlock mean nothing was done, internal that it did not complete: the same
        # request sent again is executed. An internal reply to a request that ran (its result
        # could not be read or sent) is kept: running it again would act twice.
        if kept:
            self._remember(request.msg_id, digest, reply)
        return reply, False

    def _remember(self, msg_id: str, digest: bytes, reply: bytes) -> None:
        self._cache[msg_id] = (digest, reply)
        if len(self._cache) > self._cache_size:
            self._cache.popitem(last=False)

    def _renewing(self, handler: Callable[[Mapping[str, Any]], Mapping[str, Any]]
                  ) -> Callable[[Mapping[str, Any]], Mapping[str, Any]]:
        def call(args: Mapping[str, Any]) -> Mapping[str, Any]:
            try:
                return handler(args)
            finally:
                if self._sender is not None:
                    self._leases.renew_if_held(self._sender)
        return call

    def _lease_gate(self, request: protocol.Request) -> tuple[bytes, bool] | None:
        """The reply of a ``claim`` or ``release``, or the ``leased`` refusal of an op another
        client's lease reserves, with whether the replay cache keeps it; None when the request
        goes on to the rig. A ``safe`` always
        goes on, logged with who sent it."""
        op, client = request.op, request.client
        self._sender = client
        log = self._log.bind(op=op.value, msg_id=request.msg_id, client=client)
        try:
            if op is Op.CLAIM:
                assert client is not None  # decode_request requires it
                result = self._leases.claim(client, request.args["ttl_s"])
                if not result["renewed"]:
                    log.info("lease_claimed", ttl_s=result["ttl_s"])
                return protocol.encode_result(request.msg_id, result), True
            if op is Op.RELEASE:
                assert client is not None
                result = self._leases.release(client)
                log.info("lease_released", released=result["released"])
                return protocol.encode_result(request.msg_id, result), True
            if op is Op.SAFE:
                holder = self._leases.holder()
                if holder is not None and holder.client != client:
                    log.warning("safe_requested", holder=holder.client,
                                reason="safe is open to every client; the lease stays with "
                                       "its holder")
                else:
                    log.info("safe_requested", holder=None if holder is None else holder.client)
                return None
            self._leases.check(op, client)
        except LeaseHeld as exc:
            log.info("request_refused", kind=ErrorKind.LEASED.value, detail=str(exc))
            extra = {"holder": exc.holder, "expires_in_s": round(exc.expires_in_s, 3)}
            return protocol.encode_error(request.msg_id, ErrorKind.LEASED, str(exc), extra), False
        return None

    def _execute(self, request: protocol.Request) -> tuple[bytes, bool]:
        """Run one request; its reply and whether the replay cache keeps it (see the module
        notes: not for busy, interlock, leased, or internal when the request did not complete)."""
        if (gated := self._lease_gate(request)) is not None:
            return gated
        handler = self._dispatch.get(request.op)
        if handler is None:
            kind = ErrorKind.UNKNOWN_OP
            detail = (f"op: {request.op.value!r} is offered by simulated rigs only; this rig offers "
                      f"{', '.join(op.value for op in self._dispatch)}")
            self._log.info("request_refused", op=request.op.value, msg_id=request.msg_id, kind=kind.value)
            return protocol.encode_error(request.msg_id, kind, detail), True
        try:
            result = handler(request.args)
        except DriverRefusal as exc:
            kind, detail = ErrorKind(exc.kind), str(exc)
            kept = kind not in _NOT_KEPT
        except BaseException as exc:  # noqa: BLE001 - the server must answer whatever the rig does
            # SystemExit, KeyboardInterrupt and GeneratorExit from a driver are its failures
            # too: the server's own stop never raises here (its signal handlers only ask
            # serve() to return), so nothing a driver raises may end it.
            kept = request_ran(exc)
            log = self._log.bind(op=request.op.value, msg_id=request.msg_id)
            log.exception("rig_failed", request_ran=kept)
            kind, detail = ErrorKind.INTERNAL, f"{type(exc).__name__}: {exc}"
        else:
            # One line per request the rig executed (repeats answered from the cache are
            # 'request_replayed'): a fault harness counts the rig's own acts from it.
            self._log.debug("request_executed", op=request.op.value, msg_id=request.msg_id)
            try:
                return protocol.encode_result(request.msg_id, result), True
            except ValueError as exc:
                # The request ran; only its result cannot be sent: kept, never run twice.
                log = self._log.bind(op=request.op.value, msg_id=request.msg_id)
                log.error("result_not_encodable", error=str(exc))
                return protocol.encode_error(request.msg_id, ErrorKind.INTERNAL, str(exc)), True
        self._log.info("request_refused", op=request.op.value, msg_id=request.msg_id,
                       kind=kind.value, detail=detail, kept=kept)
        return protocol.encode_error(request.msg_id, kind, detail), kept


def _digest(payload: bytes) -> bytes:
    return hashlib.blake2b(payload, digest_size=16).digest()


def _request_digest(request: protocol.Request) -> bytes:
    """What a repeated ``msg_id`` must repeat: its op and arguments. The ``client`` key names
    the sender, not the request: a resumed run resends its predecessor's pending request under
    its own identity and must get the reply the rig kept."""
    content = json.dumps({"op": request.op.value, "args": request.args}, sort_keys=True,
                         separators=(",", ":"), default=str)
    return hashlib.blake2b(content.encode(), digest_size=16).digest()


def _wildcard_port(bind: str) -> str:
    """Map port 0 to ZeroMQ's ``*`` (pick a free port)."""
    if bind.startswith("tcp://") and bind.endswith(":0"):
        return bind[:-2] + ":*"
    return bind


def _is_loopback(endpoint: str) -> bool:
    if not endpoint.startswith("tcp://"):
        return True
    host = urlsplit(endpoint).hostname or ""
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return host == "localhost"


# --------------------------------------------------------------------------- helpers of the commands


def write_ready_file(path: str | os.PathLike[str], endpoint: str) -> None:
    """Write ``endpoint`` and a newline so that a reader sees either nothing or the whole line.

    Parameters
    ----------
    path : str or PathLike
        The ready file; its folder must exist.
    endpoint : str
        The endpoint the server listens on.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    tmp.write_text(endpoint + "\n", encoding="utf-8")
    os.replace(tmp, path)


# --------------------------------------------------------------------------- in process


class LocalRig:
    """A served rig in this process, spoken to through the wire protocol without a socket.

    Offers the methods of :class:`autotune.wire.bus.BusClient` (the ``Rig`` interface plus the
    simulated-only ``truth``, ``advance`` and ``thermal_step``). Each call is encoded as a
    protocol request, answered by :meth:`RigServer.handle` (validation, error kinds, replay
    cache, instance) and decoded by the client-side parsers of :mod:`autotune.wire.protocol`, so
    only the ZeroMQ transport is left out. Benchmark studies that run hundreds of simulated
    calibrations use it; integration tests and dry runs use the real bus.

    Parameters
    ----------
    driver : object
        A rig driver (:mod:`autotune.driver`), served with :class:`autotune.kit.served.ServedDriver`
        (identity channel map unless ``setpoints`` is given), or an object that already has
        the protocol's operations (pass ``served=True``).
    setpoints : Mapping, optional
        A DRIVER.toml ``[setpoints]`` table (channel map) for the driver.
    served : bool
        True if ``driver`` already speaks the protocol's operations.

    Examples
    --------
    >>> from drivers_sim.driver import SimulatedDriver          # doctest: +SKIP
    >>> rig = LocalRig(SimulatedDriver.from_file("configs/sim-rig.toml", seed=2))   # doctest: +SKIP
    >>> rig.describe().rig                                       # doctest: +SKIP
    'bench-2-sim'
    """

    def __init__(self, driver: Any, setpoints: Mapping[str, Any] | None = None, *, served: bool = False) -> None:
        if served:
            self.served = driver
        else:
            from autotune.kit.served import ServedDriver

            self.served = ServedDriver(driver, setpoints)
        self.driver = getattr(self.served, "driver", driver)
        # Never started: only its request handler is used, so no socket is opened.
        self._server = RigServer(self.served, "inproc://local-rig", faults=FaultConfig())

    @property
    def sim(self) -> Any:
        """The simulated rig behind a simulated driver (the driver's ``sim``), for studies."""
        return self.driver.sim

    def _call(self, op: Op, args: Mapping[str, Any], parse: Callable[[Mapping[str, Any]], Any],
              msg_id: str | None = None) -> Any:
        msg_id = msg_id or protocol.new_msg_id()
        reply = self._server.handle(protocol.encode_request(op, args, msg_id))
        return parse(protocol.decode_reply(reply, msg_id))

    def describe(self) -> Description:
        """The rig's description."""
        return self._call(Op.DESCRIBE, {}, protocol.parse_description)

    def apply(self, setpoints: Mapping[str, float], *, msg_id: str | None = None) -> Applied:
        """Apply set-points (``msg_id``: repeat an earlier request)."""
        return self._call(Op.APPLY, {"setpoints": dict(setpoints)}, protocol.parse_applied,
                          msg_id)

    def acquire(self, field: str, ramsey_phase: float, shots: int, *,
                msg_id: str | None = None, resend: bool = False) -> Acquisition:
        """Acquire counts of one field state at one Ramsey phase (rad).

        In process the rig cannot restart, so ``resend`` changes nothing.
        """
        args = {"field": field, "ramsey_phase": float(ramsey_phase), "shots": int(shots)}
        return self._call(Op.ACQUIRE, args, protocol.parse_acquisition, msg_id)

    def status(self) -> Status:
        """Clock, busy flag, interlock, set-points in force, shot total."""
        return self._call(Op.STATUS, {}, protocol.parse_status)

    def safe(self, *, msg_id: str | None = None) -> Applied:
        """Go to the safe set-points."""
        return self._call(Op.SAFE, {}, protocol.parse_safe, msg_id)

    def truth(self, setpoints: Mapping[str, float] | None = None) -> dict[str, Any]:
        """The noiseless truth at ``setpoints`` (default: those in force); simulated rigs only."""
        args = {} if setpoints is None else {"setpoints": dict(setpoints)}
        return self._call(Op.TRUTH, args, protocol.parse_truth)

    def advance(self, seconds: float) -> dict[str, Any]:
        """Move the virtual clock on (s); simulated rigs only."""
        return self._call(Op.ADVANCE, {"seconds": float(seconds)}, protocol.parse_advance)

    def thermal_step(self, shift_hz: float) -> dict[str, Any]:
        """Shift the cavity frequency at once (Hz); simulated rigs only."""
        return self._call(Op.THERMAL_STEP, {"shift_hz": float(shift_hz)}, protocol.parse_thermal_step)

    def close(self) -> None:
        """Nothing to release (present for symmetry with the bus client)."""

    def __enter__(self) -> LocalRig:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
