"""The ZeroMQ client of a rig: bounded waits, retries with the same msg_id, reconnects, CURVE keys.

:class:`BusClient` speaks :mod:`autotune.wire.protocol` over a REQ socket. Every call waits at most
``timeout_s`` per attempt and makes at most ``1 + retries`` attempts, so a call never takes
longer than :attr:`BusClient.max_wait_s`. A missed reply closes the socket (linger 0), opens a
new one and resends the same bytes with the same ``msg_id``; the rig answers a repeated
``msg_id`` from its cache, so nothing is executed twice.

Before an ``apply`` leaves this process, every set-point is checked against the limits the rig
described and the configured ones (the tighter of both wins) and against ``max_step`` from the
value in force; a breach raises :class:`~autotune.errors.LimitError` and nothing is sent.

Know the rig you talk to: ``describe`` records the rig's identity (``instance``, new at every
start of the rig) and starts a watch. Every later reply is checked against it: a changed
``instance`` or a clock that went back raises :class:`~autotune.errors.RigRestarted` (call
:meth:`BusClient.describe` again to accept the new rig); an ``acquire`` reply whose set-points
in force differ from those of the last ``apply`` (or ``safe``) reply raises
:class:`~autotune.errors.RigMismatch`. Neither is ever returned as data.

The wait for an ``acquire`` reply is ``timeout_s`` plus the acquisition's own duration at the
rig's described repetition rate, so a long acquisition never times out by construction.

One logical operation keeps one ``msg_id``: pass ``msg_id=`` to repeat a request after this
client gave up on it (the rig answers from its replay cache if it executed it already).

A stop: given a ``stop`` event (set by the CLI's signal handler), every wait looks at it at
least every :data:`_STOP_POLL_S`; once it is set, the call in flight is abandoned (its socket
closed) with :class:`~autotune.errors.Interrupted` naming the op and its ``msg_id``, and so is
every later call but ``safe``, which then gets one bounded try of ``stop_safe_s`` in all.

A client is not thread-safe: use one per thread.
"""

from __future__ import annotations

import contextlib
import math
import threading
import time
import types
from collections.abc import Iterator, Mapping
from typing import Any

import structlog
import zmq
import zmq.auth

from autotune.wire import protocol
from autotune.progress import setpoint_value_text
from autotune.errors import (
    ConfigError,
    ConfigErrors,
    Interrupted,
    LimitError,
    ProtocolError,
    RigError,
    RigLeased,
    RigMismatch,
    RigRefused,
    RigRestarted,
    RigTimeout,
)
from autotune.wire.claim import LEASE_TTL_S, LeaseKeeper, client_identity, holder_gone
from autotune.wire.keys import CurveClientKeys
from autotune.wire.protocol import Acquisition, Applied, Description, Op, SetpointLimit, Status

__all__ = ["BusClient", "CurveClientKeys", "LEASE_TTL_S", "client_identity"]

_log = structlog.get_logger(__name__)

_BACKOFF_CAP_S = 2.0
"""Longest single pause between attempts, s (the backoff doubles up to this)."""

_CLOCK_SLACK_S = 1e-9
"""A clock may read this much earlier than the last one seen (float rounding only), s."""

_STOP_POLL_S = 0.2
"""Longest wait between two looks at the stop event, s."""

def _mismatch_text(name: str, in_force: float | None, applied: float) -> str:
    """``"detuning -4.06 kHz (applied -4.20 kHz)"``: in a physicist's units, with more digits
    only where those units would print the two alike."""
    if in_force is None:
        return f"{name} missing (applied {setpoint_value_text(name, applied)})"
    shown, wanted = setpoint_value_text(name, in_force), setpoint_value_text(name, applied)
    if shown == wanted:
        shown, wanted = f"{in_force:.12g}", f"{applied:.12g}"
    return f"{name} {shown} (applied {wanted})"


def _same(reported: float | None, applied: float) -> bool:
    """A reported set-point equals the applied one (to float rounding)."""
    return reported is not None and abs(reported - applied) <= 1e-9 * max(1.0, abs(applied))


@contextlib.contextmanager
def _zmq_errors(endpoint: str, op: str) -> Iterator[None]:
    """The one place where zmq exceptions become autotune ones."""
    try:
        yield
    except zmq.ZMQError as exc:
        raise RigError(f"bus to {endpoint}: {op}: {exc}") from exc


class BusClient:
    """A rig reached over ZeroMQ.

    Parameters
    ----------
    endpoint : str
        ZeroMQ endpoint of the rig, e.g. ``"tcp://127.0.0.1:5560"``.
    timeout_s : float
        Longest wait for one reply, s (> 0).
    retries : int
        Further attempts after the first (>= 0).
    backoff_s : float
        Pause before the first retry, s (>= 0); it doubles each retry, capped at 2 s.
    curve : CurveClientKeys, optional
        Encrypt and authenticate with CURVE; the rig must know the client's public key.
    limits : Mapping[str, SetpointLimit], optional
        Configured limits; where the rig also describes a limit, the tighter one wins.
    context : zmq.Context, optional
        Context to create sockets in; by default the client owns a new one.
    source : str, optional
        The configuration file the limits came from, named (with the key
        ``setpoints.NAME...``) when :meth:`describe` finds them incompatible with the rig's.
    stop : threading.Event, optional
        A stop signal: once set, a call in flight is abandoned and later calls raise
        :class:`~autotune.errors.Interrupted`, except ``safe`` (see the module notes).
    stop_safe_s : float
        The whole wait of a ``safe`` asked after ``stop`` was set, s (> 0).

    Raises
    ------
    ConfigError
        For a bad argument (names the argument, expected and got).

    Examples
    --------
    >>> with BusClient("tcp://127.0.0.1:5560", timeout_s=1.0, retries=3, backoff_s=0.1) as rig:
    ...     rig.describe()
    ...     rig.apply({"detuning": 2.0e3})
    """

    def __init__(
        self,
        endpoint: str,
        *,
        timeout_s: float,
        retries: int,
        backoff_s: float,
        curve: CurveClientKeys | None = None,
        limits: Mapping[str, SetpointLimit] | None = None,
        context: zmq.Context | None = None,
        source: str = "<BusClient>",
        stop: threading.Event | None = None,
        stop_safe_s: float = 10.0,
    ) -> None:
        def bad(key: str, expected: str, got: object) -> ConfigError:
            return ConfigError("<BusClient>", key, expected, got)

        if not isinstance(endpoint, str) or "://" not in endpoint:
            raise bad("endpoint", "a ZeroMQ endpoint such as 'tcp://127.0.0.1:5560'", endpoint)
        if isinstance(timeout_s, bool) or not isinstance(timeout_s, (int, float)) or not (
            math.isfinite(timeout_s) and timeout_s > 0
        ):
            raise bad("timeout_s", "a finite number > 0", timeout_s)
        if isinstance(retries, bool) or not isinstance(retries, int) or retries < 0:
            raise bad("retries", "an integer >= 0", retries)
        if isinstance(backoff_s, bool) or not isinstance(backoff_s, (int, float)) or not (
            math.isfinite(backoff_s) and backoff_s >= 0
        ):
            raise bad("backoff_s", "a finite number >= 0", backoff_s)
        if isinstance(stop_safe_s, bool) or not isinstance(stop_safe_s, (int, float)) or not (
            math.isfinite(stop_safe_s) and stop_safe_s > 0
        ):
            raise bad("stop_safe_s", "a finite number > 0", stop_safe_s)
        if curve is not None and not isinstance(curve, CurveClientKeys):
            raise bad("curve", "CurveClientKeys or None", type(curve).__name__)
        configured: dict[str, SetpointLimit] = {}
        for name, limit in (limits or {}).items():
            if not isinstance(limit, SetpointLimit):
                raise bad(f"limits.{name}", "a SetpointLimit", limit)
            configured[str(name)] = limit

        self._endpoint = endpoint
        self._timeout_ms = max(1, int(round(timeout_s * 1000)))
        self._timeout_s = float(timeout_s)
        self._retries = retries
        self._backoff_s = float(backoff_s)
        self._curve = curve
        self._configured = types.MappingProxyType(configured)
        self._source = str(source)
        self._stop = stop
        self._stop_safe_s = float(stop_safe_s)
        self._limits: Mapping[str, SetpointLimit] = self._configured
        self._in_force: dict[str, float] = {}
        # The watch on the rig's identity, started by describe().
        self._instance: str | None = None
        self._watching = False
        self._applied: dict[str, float] | None = None
        self._last_clock: float | None = None
        self._repetition_rate_hz: float | None = None
        self._own_context = context is None
        self._context = zmq.Context() if context is None else context
        self._socket: zmq.Socket | None = None
        self._log = _log.bind(endpoint=endpoint)
        # The lease (see claim): this client's identity once the rig granted one, and the
        # thread that renews it.
        self._lease_client: str | None = None
        self._keeper: LeaseKeeper | None = None
        try:
            self._open()
        except ConfigError:
            self.close()
            raise

    # ------------------------------------------------------------------ lifecycle

    def __enter__(self) -> BusClient:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def close(self) -> None:
        """Release the lease if one is held, close the socket (and the context if the client
        created it). Safe to call twice."""
        self.release()
        self._close_socket()
        if self._own_context and self._context is not None and not self._context.closed:
            self._context.term()

    def _open(self) -> None:
        socket = self._context.socket(zmq.REQ)
        socket.setsockopt(zmq.LINGER, 0)
        # Guard against a runaway peer; the decoder then rejects anything above the protocol limit.
        socket.setsockopt(zmq.MAXMSGSIZE, 4 * protocol.MAX_MESSAGE_BYTES)
        socket.setsockopt(zmq.RCVTIMEO, self._timeout_ms)
        if self._curve is not None:
            socket.curve_publickey = self._curve.public
            socket.curve_secretkey = self._curve.secret
            socket.curve_serverkey = self._curve.server_public
        try:
            socket.connect(self._endpoint)
        except zmq.ZMQError as exc:
            socket.close(linger=0)
            raise ConfigError("<BusClient>", "endpoint", "a connectable ZeroMQ endpoint", f"{self._endpoint} ({exc})") from exc
        self._socket = socket

    def _close_socket(self) -> None:
        if self._socket is not None:
            self._socket.close(linger=0)
            self._socket = None

    # ------------------------------------------------------------------ properties

    @property
    def endpoint(self) -> str:
        """The rig's endpoint."""
        return self._endpoint

    @property
    def max_wait_s(self) -> float:
        """Upper bound of one call's duration before RigTimeout, s (waits plus backoffs).

        An ``acquire`` waits longer by its own duration per attempt, see
        :meth:`acquire_timeout_s`.
        """
        pauses = sum(self._pause_s(attempt) for attempt in range(1, self._retries + 1))
        return (self._retries + 1) * self._timeout_s + pauses

    def acquire_timeout_s(self, shots: int) -> float:
        """The wait for one ``acquire`` reply of ``shots`` shots, s: ``timeout_s`` plus the
        acquisition's duration at the rig's repetition rate (known after :meth:`describe`)."""
        if self._repetition_rate_hz is None:
            return self._timeout_s
        return self._timeout_s + float(shots) / self._repetition_rate_hz

    @property
    def instance(self) -> str | None:
        """The rig identity seen by the last :meth:`describe` (None if the rig reports none)."""
        return self._instance

    @property
    def limits(self) -> Mapping[str, SetpointLimit]:
        """Effective limits: the tighter of described and configured, per set-point."""
        return self._limits

    @property
    def setpoints(self) -> Mapping[str, float]:
        """Set-points in force as last reported by the rig (empty until a reply told them)."""
        return types.MappingProxyType(dict(self._in_force))

    # ------------------------------------------------------------------ the ops

    def describe(self) -> Description:
        """Ask the rig to describe itself; its limits then join the effective limits.

        It also (re)starts the watch on the rig's identity: the ``instance`` it reports is the
        one every later reply must carry, and the clock, set-points and applied values known
        so far are forgotten (call it again to accept a restarted rig).

        Raises
        ------
        ConfigErrors
            If configured limits have another unit than the rig's or do not overlap them:
            every such set-point at once, each named by its key in ``source``.
        """
        description = protocol.parse_description(self._call(Op.DESCRIBE, {}))
        self._instance = description.instance
        self._watching = True
        self._applied = None
        self._last_clock = None
        self._in_force.clear()
        self._repetition_rate_hz = float(description.repetition_rate_hz)
        merged = dict(description.setpoints)
        problems: list[ConfigError] = []
        for name, configured in self._configured.items():
            if name not in merged:
                merged[name] = configured
                continue
            described = merged[name]
            key = f"setpoints.{name}"
            if described.unit != configured.unit:
                problems.append(ConfigError(self._source, f"{key}.unit",
                                            f"the rig's unit {described.unit!r}",
                                            configured.unit))
                continue
            try:
                merged[name] = described.tighter(configured)
            except ValueError:
                problems.append(ConfigError(
                    self._source, f"{key}.limit_min/limit_max",
                    f"limits that overlap the rig's [{described.min:g}, {described.max:g}] "
                    f"{described.unit}", [configured.min, configured.max]))
        if problems:
            raise ConfigErrors(problems)
        self._limits = types.MappingProxyType(merged)
        return description

    def apply(self, setpoints: Mapping[str, float], *, msg_id: str | None = None) -> Applied:
        """Change set-points (partial allowed), after checking limits and steps locally.

        Parameters
        ----------
        setpoints : Mapping[str, float]
            New values in each set-point's unit (``velocity`` m/s, ``detuning`` Hz).

        msg_id : str, optional
            Repeat an earlier request with this id (default: a new one).

        Returns
        -------
        Applied
            All set-points in force and the rig clock.

        Raises
        ------
        LimitError
            If a value is outside the effective limits, the step from the value in force is
            larger than ``max_step``, or no limit is known for a name (call :meth:`describe`).
        RigRestarted
            The reply came from a restarted rig (see the module notes).
        """
        wanted = self._check_setpoints(setpoints)
        try:
            applied = protocol.parse_applied(self._call(Op.APPLY, {"setpoints": wanted},
                                                        msg_id=msg_id))
            self._watch(applied.instance, applied.clock, "apply")
        except (RigError, Interrupted):
            # It may have been applied without our hearing of it: the next step check asks first.
            self._in_force.clear()
            self._applied = None
            raise
        self._in_force = dict(applied.setpoints)
        self._applied = dict(applied.setpoints)
        return applied

    def acquire(self, field: str, ramsey_phase: float, shots: int, *,
                msg_id: str | None = None, resend: bool = False) -> Acquisition:
        """Take ``shots`` samples with the given field state and Ramsey phase (rad).

        Parameters
        ----------
        field : {"empty", "one_photon"}
            Field state prepared before each sample.
        ramsey_phase : float
            Phase of the second Ramsey zone, rad.
        shots : int
            Samples to take.
        msg_id : str, optional
            Repeat an earlier request with this id (default: a new one).
        resend : bool
            The request may have been executed before this client last heard from the rig
            (a resume): its reply may come from the replay cache, with an earlier clock, so the
            clock is not checked against the last one seen.

        Raises
        ------
        RigRestarted
            The reply came from a restarted rig.
        RigMismatch
            The set-points in force during the acquisition are not those last applied.
        """
        acquisition = protocol.parse_acquisition(self._call(
            Op.ACQUIRE, {"field": field, "ramsey_phase": ramsey_phase, "shots": shots},
            msg_id=msg_id, timeout_s=self.acquire_timeout_s(shots)))
        try:
            self._watch(acquisition.instance, None if resend else acquisition.t_start, "acquire")
            self._watch(acquisition.instance, acquisition.t_end, "acquire", advance_only=resend)
            if self._watching and self._applied is not None:
                differ = [name for name, value in self._applied.items()
                          if not _same(acquisition.setpoints.get(name), value)]
                if differ:
                    shown = ", ".join(_mismatch_text(n, acquisition.setpoints.get(n),
                                                     self._applied[n]) for n in differ)
                    raise RigMismatch(f"acquire at {self._endpoint}: the set-points in force "
                                      f"were not those applied: {shown}")
        except RigMismatch as exc:
            # The caller accounts for the shots the rig took, without filing them as data.
            exc.reply = acquisition
            self._applied = None
            raise
        self._in_force = dict(acquisition.setpoints)
        return acquisition

    def status(self) -> Status:
        """Ask for the rig's clock, interlock, set-points in force and shot total.

        Raises
        ------
        RigRestarted
            The reply came from a restarted rig.
        """
        status = protocol.parse_status(self._call(Op.STATUS, {}))
        self._watch(status.instance, status.clock, "status")
        self._in_force = dict(status.setpoints)
        return status

    def safe(self, *, msg_id: str | None = None) -> Applied:
        """Move the rig to its safe set-points (the rig's own procedure; ``clock`` is None).

        A reply from a restarted rig is accepted here (the rig is at its safe set-points either
        way) and not raised.
        """
        try:
            applied = protocol.parse_safe(self._call(Op.SAFE, {}, msg_id=msg_id))
        except (RigError, Interrupted):
            self._in_force.clear()
            self._applied = None
            raise
        self._in_force.update(applied.setpoints)
        self._applied = dict(self._in_force)
        return applied

    def truth(self, setpoints: Mapping[str, float] | None = None) -> dict[str, Any]:
        """Simulated rig only: the model's exact figures at ``setpoints`` (default: in force)."""
        args = {} if setpoints is None else {"setpoints": dict(setpoints)}
        return protocol.parse_truth(self._call(Op.TRUTH, args))

    def advance(self, seconds: float) -> dict[str, Any]:
        """Simulated rig only: move the virtual clock on by ``seconds`` (s)."""
        return protocol.parse_advance(self._call(Op.ADVANCE, {"seconds": seconds}))

    def thermal_step(self, shift_hz: float) -> dict[str, Any]:
        """Simulated rig only: a sudden cavity frequency step of ``shift_hz`` (Hz)."""
        return protocol.parse_thermal_step(self._call(Op.THERMAL_STEP, {"shift_hz": shift_hz}))

    # ------------------------------------------------------------------ the lease

    def claim(self, client: str, *, ttl_s: float = LEASE_TTL_S, wait_s: float = 0.0
              ) -> protocol.Lease | None:
        """Take the rig's lease for this client, and keep it renewed until :meth:`release`.

        From then on every request carries ``client``; a thread with its own socket claims
        again every third of ``ttl_s``, so the lease lasts while this process does and ends
        within ``ttl_s`` of its death.

        Parameters
        ----------
        client : str
            This client's identity (see :func:`client_identity`).
        ttl_s : float
            The lease's time to live, s.
        wait_s : float
            How long to wait for a lease another client holds, s (0: refuse at once).

        Returns
        -------
        Lease or None
            The lease; None for a rig without leases (it answered ``unknown_op`` or
            ``bad_request`` to a valid claim), after one warning: the run then goes on as
            before, without the protection.

        Raises
        ------
        RigLeased
            Another client holds the lease (still, after ``wait_s``).
        """
        deadline = time.monotonic() + wait_s
        waiting = False
        while True:
            self._lease_client = client
            try:
                lease = protocol.parse_claim(self._call(Op.CLAIM, {"ttl_s": float(ttl_s)}))
            except RigLeased as exc:
                self._lease_client = None
                left = deadline - time.monotonic()
                if holder_gone(exc.holder) and exc.expires_in_s is not None:
                    # A process of this host that no longer runs (killed before it could
                    # release): its lease runs out by itself; wait for that, as for a lock.
                    deadline = max(deadline, time.monotonic() + exc.expires_in_s + 0.5)
                    left = deadline - time.monotonic()
                    if not waiting:
                        self._log.warning("waiting_for_lease", detail=exc.detail,
                                          reason="its holder no longer runs on this host",
                                          wait_s=round(left, 1))
                        waiting = True
                if left <= 0:
                    raise
                if not waiting:
                    self._log.warning("waiting_for_lease", detail=exc.detail,
                                      wait_s=round(left, 1))
                    waiting = True
                time.sleep(min(1.0, left))
                continue
            except RigRefused as exc:
                self._lease_client = None
                if exc.kind in ("unknown_op", "bad_request"):
                    self._log.warning("rig_without_lease", reason=f"the rig answered "
                                      f"{exc.kind} to a claim ({exc.detail}); going on without a "
                                      f"lease: another client could move this rig meanwhile")
                    return None
                raise
            except BaseException:
                self._lease_client = None
                raise
            break
        self._log.info("lease_held", client=client, ttl_s=lease.ttl_s)
        self._keeper = LeaseKeeper(self._context, self._endpoint, self._curve, client,
                                    float(ttl_s), self._timeout_s, self._log)
        self._keeper.start()
        return lease

    def release(self) -> None:
        """End this client's lease (one bounded attempt: a lease not released runs out within
        its ttl). Does nothing without a lease. Never raises."""
        keeper, self._keeper = self._keeper, None
        if keeper is None:
            return
        keeper.stop()
        data = protocol.encode_request(Op.RELEASE, {}, protocol.new_msg_id(),
                                       client=self._lease_client)
        reply = keeper.exchange_once(data)
        self._lease_client = None
        if reply is None:
            self._log.warning("lease_not_released", reason="no reply; the lease runs out "
                              "within its ttl")
        else:
            self._log.info("lease_released")

    # ------------------------------------------------------------------ guards

    def _watch(self, instance: str | None, clock: float | None, op: str, *,
               advance_only: bool = False) -> None:
        """Check a reply's identity and clock against the watch; remember the latest clock."""
        if not self._watching:
            return
        if instance is not None and self._instance is not None and instance != self._instance:
            raise RigRestarted(f"{op} at {self._endpoint}: the rig's instance changed from "
                               f"{self._instance!r} to {instance!r}: it restarted (its clock, "
                               f"set-points in force and replay cache are gone)")
        if instance is not None and self._instance is None:
            raise RigRestarted(f"{op} at {self._endpoint}: the rig now reports instance "
                               f"{instance!r}, it reported none when described: another rig "
                               f"or a restart")
        if clock is None:
            return
        if self._last_clock is not None and clock < self._last_clock - _CLOCK_SLACK_S:
            if advance_only:
                return
            raise RigRestarted(f"{op} at {self._endpoint}: the rig clock went back from "
                               f"{self._last_clock:.3f} s to {clock:.3f} s: it restarted or "
                               f"another client reset it")
        self._last_clock = clock if self._last_clock is None else max(self._last_clock, clock)

    def _check_setpoints(self, setpoints: Mapping[str, float]) -> dict[str, float]:
        if not isinstance(setpoints, Mapping) or not setpoints:
            raise LimitError(f"apply: expected a non-empty mapping of set-point: value, got {setpoints!r}")
        unknown_force = [n for n in setpoints if n not in self._in_force]
        if unknown_force and all(n in self._limits for n in setpoints):
            # The step check needs the values in force; ask once rather than guess.
            self.status()
        wanted: dict[str, float] = {}
        for name, value in setpoints.items():
            limit = self._limits.get(name)
            if limit is None:
                known = ", ".join(sorted(self._limits)) or "none (call describe() first)"
                raise LimitError(f"set-point {name!r}: no limit known (known: {known}); refused {value!r}")
            try:
                number = float(value) if not isinstance(value, bool) else math.nan
            except (TypeError, ValueError, OverflowError):
                number = math.nan
            if not isinstance(value, (int, float)) or not math.isfinite(number):
                raise LimitError(f"set-point {name!r}: expected a finite number, got {value!r}")
            value = number
            if not limit.min <= value <= limit.max:
                raise LimitError(
                    f"set-point {name!r}: {value!r} {limit.unit} is outside the limit "
                    f"[{limit.min!r}, {limit.max!r}] {limit.unit}"
                )
            current = self._in_force.get(name)
            if current is None:
                raise LimitError(f"set-point {name!r}: the value in force is unknown, so the step cannot be checked")
            step = abs(value - current)
            if step > limit.max_step * (1 + protocol.STEP_TOLERANCE):
                raise LimitError(
                    f"set-point {name!r}: step {step!r} {limit.unit} from {current!r} to {value!r} "
                    f"exceeds the limit max_step {limit.max_step!r} {limit.unit}"
                )
            wanted[name] = value
        return wanted

    # ------------------------------------------------------------------ transport

    def _pause_s(self, attempt: int) -> float:
        return min(self._backoff_s * 2 ** (attempt - 1), _BACKOFF_CAP_S) if attempt > 0 else 0.0

    def _stopped(self) -> bool:
        return self._stop is not None and self._stop.is_set()

    def _abandon(self, op: Op, msg_id: str) -> Interrupted:
        """The call in flight is given up at a stop: its REQ socket cannot be reused."""
        self._close_socket()
        return Interrupted(f"stopped by signal: {op.value} to {self._endpoint} abandoned "
                           f"(msg_id {msg_id})")

    def _call(self, op: Op, args: Mapping[str, Any], *, msg_id: str | None = None,
              timeout_s: float | None = None) -> dict[str, Any]:
        msg_id = msg_id if msg_id is not None else protocol.new_msg_id()
        data = protocol.encode_request(op, args, msg_id, client=self._lease_client)
        timeout_ms = self._timeout_ms if timeout_s is None else max(1, int(round(timeout_s * 1000)))
        # After a stop only safe goes out, once, within its own bound; a second signal is the
        # CLI's to handle (it ends the process).
        interruptible = op is not Op.SAFE
        deadline = None
        if self._stopped():
            if interruptible:
                raise self._abandon(op, msg_id)
            deadline = time.monotonic() + self._stop_safe_s
        log = None  # bound on the first trouble only: the clean path stays cheap
        last_problem: ProtocolError | None = None
        attempts = 0
        for attempt in range(self._retries + 1):
            if attempt > 0:
                log = log or self._log.bind(op=op.value, msg_id=msg_id)
                pause = self._pause_s(attempt)
                if deadline is not None:
                    pause = min(pause, max(0.0, deadline - time.monotonic()))
                log.warning("bus_retry", retry=f"{attempt} of {self._retries}", pause_s=pause,
                            reason="malformed reply" if last_problem else "no reply")
                if interruptible and self._stop is not None:
                    if self._stop.wait(pause):
                        raise self._abandon(op, msg_id)
                else:
                    time.sleep(pause)
            wait_ms = timeout_ms
            if deadline is not None:
                wait_ms = int((deadline - time.monotonic()) * 1000)
                if wait_ms <= 0:
                    break
                wait_ms = min(timeout_ms, wait_ms)
            if self._socket is None:
                self._open()
                (log or self._log.bind(op=op.value, msg_id=msg_id)).info("bus_reconnect", attempt=attempt)
            attempts += 1
            frames = self._exchange(data, op, wait_ms, msg_id=msg_id if interruptible else None)
            if frames is None:
                last_problem = None
                # A REQ socket that missed its reply cannot send again: start a fresh one.
                self._close_socket()
                continue
            try:
                if len(frames) != 1:
                    raise ProtocolError(f"reply: expected one frame, got {len(frames)}")
                return protocol.decode_reply(frames[0], msg_id)
            except ProtocolError as exc:
                last_problem = exc
                log = log or self._log.bind(op=op.value, msg_id=msg_id)
                log.warning("bus_malformed_reply", attempt=attempt, error=str(exc))
        if last_problem is not None:
            raise ProtocolError(
                f"{op.value} to {self._endpoint}: no valid reply in {attempts} attempts; last: {last_problem}"
            ) from last_problem
        if deadline is not None:
            raise RigTimeout(f"{op.value} to {self._endpoint}: no reply within "
                             f"{self._stop_safe_s:g} s after the stop signal, {attempts} "
                             f"attempts (msg_id {msg_id})")
        raise RigTimeout(
            f"{op.value} to {self._endpoint}: no reply within {timeout_ms / 1000:g} s, "
            f"{attempts} attempts (msg_id {msg_id})"
        )

    def _exchange(self, data: bytes, op: Op, timeout_ms: int, *,
                  msg_id: str | None = None) -> list[bytes] | None:
        """Send one request and wait for its reply frames; ``None`` if none came within the bound.

        With ``msg_id`` and a stop event the wait looks at the event every
        :data:`_STOP_POLL_S` and abandons the request once it is set."""
        socket = self._socket
        assert socket is not None
        if msg_id is not None and self._stop is not None:
            return self._exchange_watching(socket, data, op, timeout_ms, msg_id)
        with _zmq_errors(self._endpoint, op.value):
            try:
                socket.send(data, zmq.NOBLOCK)
                receive_ms = timeout_ms
            except zmq.Again:
                # No pipe to the peer yet: wait for room, within the same bound.
                started = time.monotonic()
                if not socket.poll(timeout_ms, zmq.POLLOUT):
                    return None
                socket.send(data, zmq.NOBLOCK)
                receive_ms = max(1, timeout_ms - int((time.monotonic() - started) * 1000))
            if receive_ms != self._timeout_ms:
                socket.setsockopt(zmq.RCVTIMEO, receive_ms)
            try:
                # RCVTIMEO bounds this receive; cheaper than a poll followed by a receive.
                return socket.recv_multipart()
            except zmq.Again:
                return None
            finally:
                if receive_ms != self._timeout_ms:
                    socket.setsockopt(zmq.RCVTIMEO, self._timeout_ms)

    def _exchange_watching(self, socket: zmq.Socket, data: bytes, op: Op, timeout_ms: int,
                           msg_id: str) -> list[bytes] | None:
        """:meth:`_exchange` in slices of at most :data:`_STOP_POLL_S`, watching the stop."""
        assert self._stop is not None
        deadline = time.monotonic() + timeout_ms / 1000

        def wait(event: int) -> bool:
            while True:
                if self._stop.is_set():  # type: ignore[union-attr]
                    raise self._abandon(op, msg_id)
                left = deadline - time.monotonic()
                if left <= 0:
                    return False
                if socket.poll(max(1, int(min(left, _STOP_POLL_S) * 1000)), event):
                    return True

        with _zmq_errors(self._endpoint, op.value):
            if not wait(zmq.POLLOUT):
                return None
            socket.send(data, zmq.NOBLOCK)
            if not wait(zmq.POLLIN):
                return None
            return socket.recv_multipart(zmq.NOBLOCK)
