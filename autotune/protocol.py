"""The wire protocol between autotune and a rig (version 1).

This module is the protocol's specification and its only implementation in this project: the
client (:mod:`autotune.bus`) and the rig server (:mod:`autotune.server`, behind ``autotune
serve`` and ``autotune rig``) both import it. A control-system team can implement a rig from
this text alone, or write a driver and let ``autotune serve`` implement it (:mod:`autotune.driver`).

Transport
---------
ZeroMQ over TCP, loopback (``tcp://127.0.0.1:PORT``) unless the operator says otherwise. The
client uses a REQ socket; the rig should use a ROUTER socket (a REP socket also works, but a
ROUTER does not wedge when a reply is lost). Each message is **one frame** of UTF-8 JSON
(RFC 8259) holding one JSON object. No pickle, no binary payloads. Messages larger than
:data:`MAX_MESSAGE_BYTES` are invalid. ``NaN``, ``Infinity`` and numbers that overflow a double
are invalid, as are duplicate keys in an object. Optional CURVE encryption and client
authentication (ZeroMQ's CurveZMQ) wrap the same messages.

Request::

    {"proto": 1, "msg_id": "<hex>", "op": "<op>", "args": {...}}

Reply, success::

    {"proto": 1, "msg_id": "<same>", "ok": true, "result": {...}}

Reply, failure::

    {"proto": 1, "msg_id": "<same>", "ok": false, "error": {"kind": "<kind>", "detail": "<text>"}}

All four request keys are required; the one optional key is ``client`` (see *One driver at a
time* below), and no other key is allowed. ``proto`` is the integer 1; a
request with another integer gets an ``unsupported_version`` error. ``msg_id`` is 1 to 64
lower-case hexadecimal characters, unique per logical request (autotune sends 32, from a
cryptographic random source). When the rig cannot read a request's ``msg_id`` it answers with
``"msg_id": ""``.

Idempotency: a client that gets no reply resends the **same bytes with the same msg_id**. A rig
must answer a repeated ``msg_id`` with the reply it gave the first time, without executing the
request again (so an acquisition is never counted twice). autotune's server keeps the last 1024
replies. A ``msg_id`` reused with a different request (another op or other arguments) is
answered with ``bad_request``; the ``client`` key is not part of that comparison, because a run
resumed in a new process resends its predecessor's unanswered request under its own identity.
autotune keeps one ``msg_id`` for one logical operation across all of its own retries too (the
bus client's resends and the loop's later retries after a timeout, a ``busy`` or
``internal`` reply or an interlock), so a rig that keeps its replies makes every retry safe: a
request it already executed is answered from its cache, never run again. Replies of kind
``busy`` and ``interlock`` say that nothing was done: a rig must not keep them, so that the same
request sent again once the rig is free is executed. A reply of kind ``internal`` says that the
rig failed while executing the request, not that the request was done: a rig must not keep it
when the request did not complete (its driver or hardware call failed), so that the same
request sent again reaches the rig again and may succeed; autotune retries it like a timeout.
When the request did run and only its result could not be read back or sent (a read-back after
the move, a malformed result of a completed acquisition), the rig must keep its ``internal``
reply: running the request again would act twice (an acquisition counted twice). Every other
reply (results and the other error kinds) must be kept. autotune's server does exactly this,
and ``autotune probe`` checks it whenever the rig answers ``internal`` (rule ``internal``).

Error kinds (``error.kind``), see :class:`ErrorKind`:

===================== ==========================================================================
bad_request           the message is not valid JSON, not an object, misses a key, has a wrong
                      type, an unknown key, or a value the rig cannot take
unknown_op            ``op`` is not one of the ops below
out_of_range          a set-point is outside its limits, or the step from the value in force is
                      larger than ``max_step``; the detail names set-point, limit and value
busy                  the rig cannot take the request now; retry later
interlock             a hardware interlock is set; nothing was changed
internal              the rig failed while executing the request; it did not complete
                      (the same request sent again is executed again) unless it ran and
                      only its result failed (then the reply is kept, see Idempotency)
unsupported_version   ``proto`` is not 1
leased                another client holds the rig's lease (see *One driver at a time*); nothing
                      was done; the detail names the holder and when its lease runs out
===================== ==========================================================================

``error.detail`` is human-readable text naming what was wrong, what was expected and what was
received.

Set-points
----------
A set-point dict maps a name to a finite number. Names of this version: ``velocity`` (m/s, the
selected atomic velocity class) and ``detuning`` (Hz, atom-cavity detuning set-point,
``(f_eg - f_cavity)``). A rig describes which names it has.

Ops
---
Times (``clock``, ``t_start``, ``t_end``) are seconds on the rig's own clock (a virtual clock on
a simulated rig); phases are radians; frequencies are Hz; counts and shots are integers.

``describe``, args ``{}``, result::

    {"rig": str, "proto": 1, "simulated": bool,
     "setpoints": {NAME: {"unit": str, "min": float, "max": float, "max_step": float}},
     "fields": ["empty", "one_photon"], "repetition_rate_hz": float,
     "safe_setpoints": {NAME: float}}

    ``min``/``max`` bound each set-point, ``max_step`` (> 0) bounds one change of it;
    ``repetition_rate_hz`` is the number of shots (samples) per second.

    Optional keys (added in a backward-compatible way; a client must accept their absence):
    ``"instance": str``, the rig's identity, see *Rig identity* below;
    ``"max_shots_per_acquisition": int``, the most shots one ``acquire`` accepts (default
    :data:`MAX_SHOTS`).

``apply``, args ``{"setpoints": {NAME: float, ...}}`` (one or more names; the others keep their
value), result ``{"setpoints": {NAME: float, ...all in force}, "clock": float}``.

``acquire``, args ``{"field": "empty" | "one_photon", "ramsey_phase": float, "shots": int}``
(``ramsey_phase`` in rad; ``1 <= shots <=`` :data:`MAX_SHOTS`), result::

    {"counts": {"e": int, "g": int, "i": int}, "shots": int,
     "t_start": float, "t_end": float, "setpoints": {NAME: float, ...in force}}

    ``counts`` are detected atoms per detected state; ``t_end - t_start`` is the rig time spent.

``status``, args ``{}``, result::

    {"clock": float, "busy": bool, "interlock": null | str,
     "setpoints": {NAME: float, ...in force}, "shots_total": int}

    ``shots_total`` counts every shot acquired since the rig started.

``safe``, args ``{}``: move every set-point to its safe value; result
``{"setpoints": {NAME: float, ...the safe ones, now in force}}``.

Rig identity
------------
A rig should add ``"instance": str`` (1 to 64 characters of ``[0-9A-Za-z_-]``) to the results of
``describe``, ``status``, ``apply``, ``acquire`` and ``safe``. It is drawn afresh every time the
rig (or its server) starts and stays the same until it stops, so a client that sees it change
knows the rig restarted: its clock, set-points in force and replay cache are gone. A rig without
the key is still valid; the client then relies on the other checks (set-points in force and a
clock that never goes back). autotune checks every ``acquire`` reply: the instance is the one
it started with, the set-points in force are those it applied, and ``t_start`` is not earlier
than the clock of the last reply. A mismatch is never filed as data.

One driver at a time
--------------------
Optional, backward compatible: a rig that offers it answers ``claim``; one that does not
answers ``unknown_op`` (or ``bad_request``, as a rig of the first edition does for the
``client`` key), and a client then goes on without a lease.

A client names itself with the request key ``"client": str`` (1 to 128 printable ASCII
characters; autotune sends ``USER@HOST pid PID (COMMAND)``). ``claim`` gives the rig to one
client for ``ttl_s`` seconds; claiming again before the lease runs out renews it, and so does
the end of every request the holder sends (a request longer than ``ttl_s``, such as a long
acquisition, never loses the lease); ``release`` ends it; a lease not renewed in time ends by itself (a client that died frees the rig within
its ttl). While a lease is held:

- ``apply``, ``acquire`` and ``advance`` (the ops that move the rig, acquire, or spend its
  time) from any other client, or without ``client``, are answered ``leased``; like ``busy``
  and ``interlock``, a ``leased`` reply is never kept for replay (the same request sent once
  the lease is free is executed);
- ``describe``, ``status`` and ``truth`` (the ops that read) stay open to everyone, and so does
  the simulated rig's ``thermal_step`` (it plays the lab's environment, not a driver);
- ``safe`` stays open to everyone (a person must always be able to park the rig); the rig logs
  who sent it, and the lease stays with its holder (whose next acquisition then sees set-points
  it did not apply).

With no lease held every client may send every op, with or without ``client``, as in the first
edition of this protocol. The identity is what a client says it is: the lease guards against
accidents (two runs, a person and a cron job), not against a client that lies; CURVE decides who
may connect at all.

``claim``, request key ``client`` required, args ``{"ttl_s": float}`` (``0 < ttl_s <=``
:data:`MAX_LEASE_TTL_S`), result::

    {"holder": str, "ttl_s": float, "expires_in_s": float, "renewed": bool}

    ``renewed`` is true when the same client already held the lease. Claimed while another
    client holds it: ``leased``.

``release``, request key ``client`` required, args ``{}``, result ``{"released": bool}``
(false when this client held no lease). Sent while another client holds it: ``leased``.

The ``leased`` error object has two more keys: ``"holder": str`` (the holder's identity) and
``"expires_in_s": float`` (seconds until its lease runs out unless renewed); its detail reads
``rig leased by HOLDER for another S s (until UTC-TIME unless renewed)``, and a client shows it
to its user as it is. (A client of the first edition reads ``leased`` as an unknown error
kind: it stops, as it should, rather than drive a rig someone else drives.)

autotune claims for :data:`autotune.bus.LEASE_TTL_S` seconds and renews every third of it
from a thread of its own; it waits for a lease whose holder it knows is dead (a process of its
own host that no longer runs) to run out, and refuses to start on one held by a live client
unless told to wait (``--wait-lease-s``).

Simulated rig only (a real rig answers ``unknown_op``):

``truth``, args ``{}`` or ``{"setpoints": {NAME: float}}``: the model's exact fringes and figures
of merit at the given set-points (default: those in force); result is an object, see the
simulated rig's documentation. ``advance``, args ``{"seconds": float >= 0}``: move the virtual
clock on, result ``{"clock": float}``. ``thermal_step``, args ``{"shift_hz": float}``: a sudden
cavity frequency step, result ``{"clock": float, "cavity_offset_hz": float}``.
"""

from __future__ import annotations

import dataclasses
import enum
import json
import math
import re
import secrets
import types
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Annotated, Any, Literal, TypeVar

import pydantic
from pydantic import Strict

from autotune.errors import ProtocolError, RigLeased, RigRefused
from autotune import schema

_T = TypeVar("_T")

__all__ = [
    "STEP_TOLERANCE",
    "PROTO_VERSION",
    "MAX_MESSAGE_BYTES",
    "MAX_SHOTS",
    "MAX_LEASE_TTL_S",
    "LEASED_OPS",
    "Op",
    "ErrorKind",
    "Field",
    "Request",
    "RequestRejected",
    "SetpointLimit",
    "Description",
    "Applied",
    "Counts",
    "Acquisition",
    "Status",
    "new_msg_id",
    "encode_request",
    "encode_result",
    "encode_error",
    "decode_request",
    "decode_reply",
    "validate_args",
    "parse_description",
    "parse_applied",
    "parse_acquisition",
    "parse_status",
    "parse_safe",
    "parse_truth",
    "parse_advance",
    "parse_thermal_step",
    "Lease",
    "parse_claim",
    "parse_release",
    "check_client",
]

PROTO_VERSION = 1
"""The protocol version this module speaks."""

MAX_MESSAGE_BYTES = 1 << 20
"""Largest valid message, bytes of UTF-8 JSON (1 MiB)."""

MAX_SHOTS = 10_000_000
"""Largest number of shots one ``acquire`` may ask for."""

MAX_LEASE_TTL_S = 3600.0
"""Longest lease one ``claim`` may ask for, s."""

STEP_TOLERANCE = 1e-9
"""Relative slack of every ``max_step`` check: a step up to ``max_step * (1 + STEP_TOLERANCE)``
is accepted, so that float rounding does not refuse a step of exactly ``max_step``."""

_MSG_ID_RE = re.compile(r"[0-9a-f]{1,64}")
_INSTANCE_RE = re.compile(r"[0-9A-Za-z_-]{1,64}")
_CLIENT_RE = re.compile(r"[ -~]{1,128}")


class Op(str, enum.Enum):
    """The operations of the protocol."""

    DESCRIBE = "describe"
    APPLY = "apply"
    ACQUIRE = "acquire"
    STATUS = "status"
    SAFE = "safe"
    TRUTH = "truth"
    ADVANCE = "advance"
    THERMAL_STEP = "thermal_step"
    CLAIM = "claim"
    RELEASE = "release"


#: The ops a lease reserves to its holder: those that move the rig, acquire or spend its time.
LEASED_OPS = frozenset({Op.APPLY, Op.ACQUIRE, Op.ADVANCE})


class ErrorKind(str, enum.Enum):
    """The kinds of error reply (``error.kind``)."""

    BAD_REQUEST = "bad_request"
    UNKNOWN_OP = "unknown_op"
    OUT_OF_RANGE = "out_of_range"
    BUSY = "busy"
    INTERLOCK = "interlock"
    INTERNAL = "internal"
    UNSUPPORTED_VERSION = "unsupported_version"
    LEASED = "leased"


class Field(str, enum.Enum):
    """The field states an acquisition can prepare in the cavity."""

    EMPTY = "empty"
    ONE_PHOTON = "one_photon"


class RequestRejected(Exception):
    """A request cannot be executed; the server answers it with an error reply.

    Parameters
    ----------
    kind : ErrorKind
        The error kind to report.
    detail : str
        What was wrong, expected and got.
    msg_id : str
        The request's ``msg_id`` when it could be read, else ``""``.
    """

    def __init__(self, kind: ErrorKind, detail: str, msg_id: str = "") -> None:
        self.kind = kind
        self.detail = detail
        self.msg_id = msg_id
        super().__init__(f"{kind.value}: {detail}")


@dataclass(frozen=True)
class Request:
    """A validated request.

    Attributes
    ----------
    msg_id : str
        The client's message id (hex).
    op : Op
        The operation.
    args : Mapping[str, Any]
        The arguments, validated and normalised by :func:`validate_args` (floats as ``float``).
    client : str or None
        The sending client's identity (request key ``client``), None when it sent none.
    """

    msg_id: str
    op: Op
    args: Mapping[str, Any]
    client: str | None = None


# --------------------------------------------------------------------------- JSON boundary


class _Invalid(ValueError):
    """Internal: a JSON document breaks one of the protocol's strictness rules."""


def _reject_constant(name: str) -> Any:
    raise _Invalid(f"non-finite number {name} is not valid JSON")


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise _Invalid(f"number {text[:40]} overflows a double")
    return value


def _unique_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    result: dict[str, Any] = {}
    for key, value in pairs:
        if key in result:
            raise _Invalid(f"duplicate key {key!r}")
        result[key] = value
    return result


# Built once: json.loads/dumps with options would build a new coder on every call.
_DECODER = json.JSONDecoder(
    parse_constant=_reject_constant, parse_float=_finite_float, object_pairs_hook=_unique_keys
)
_ENCODER = json.JSONEncoder(allow_nan=False, separators=(",", ":"), ensure_ascii=False)


def _loads(data: bytes) -> dict[str, Any]:
    """Decode one message; raise ``_Invalid`` with a reason on any breach of the rules."""
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise _Invalid(f"expected bytes, got {type(data).__name__}")
    if len(data) > MAX_MESSAGE_BYTES:
        raise _Invalid(f"expected at most {MAX_MESSAGE_BYTES} bytes, got {len(data)}")
    try:
        text = bytes(data).decode("utf-8")
        value = _DECODER.decode(text)
    except _Invalid:
        raise
    except UnicodeDecodeError as exc:
        raise _Invalid(f"expected UTF-8 text, got undecodable byte at {exc.start}") from exc
    except (ValueError, RecursionError) as exc:
        # json.JSONDecodeError is a ValueError; so are over-long integer literals.
        raise _Invalid(f"expected JSON, got {str(exc)[:200]}") from exc
    if not isinstance(value, dict):
        raise _Invalid(f"expected a JSON object, got {_json_type(value)}")
    return value


def _dumps(message: Mapping[str, Any]) -> bytes:
    return _ENCODER.encode(message).encode()


def _json_type(value: object) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, (int, float)):
        return "number"
    if isinstance(value, str):
        return "string"
    if isinstance(value, list):
        return "array"
    if isinstance(value, dict):
        return "object"
    return type(value).__name__


def _show(value: object) -> str:
    """A short rendering of a received value for an error detail."""
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


# --------------------------------------------------------------------------- ids and encoding


def new_msg_id() -> str:
    """Return a fresh message id: 32 lower-case hex characters from a cryptographic source."""
    return secrets.token_hex(16)


def encode_request(op: Op, args: Mapping[str, Any], msg_id: str, *,
                   client: str | None = None) -> bytes:
    """Build the bytes of a request, validating ``args`` first.

    Parameters
    ----------
    op : Op
        The operation.
    args : Mapping[str, Any]
        Its arguments (see the module docstring).
    msg_id : str
        A message id from :func:`new_msg_id`.
    client : str, optional
        The client's identity (request key ``client``; required by ``claim`` and
        ``release``), see :func:`check_client`.

    Returns
    -------
    bytes
        One UTF-8 JSON frame.

    Raises
    ------
    ProtocolError
        If the arguments do not follow the protocol (the caller's mistake).
    """
    op = Op(op)
    if not isinstance(msg_id, str) or _MSG_ID_RE.fullmatch(msg_id) is None:
        raise ProtocolError(f"msg_id: expected 1-64 lower-case hex characters, got {_show(msg_id)}")
    try:
        clean = validate_args(op, args)
    except RequestRejected as exc:
        raise ProtocolError(f"{op.value} request: {exc.detail}") from exc
    message: dict[str, Any] = {"proto": PROTO_VERSION, "msg_id": msg_id, "op": op.value,
                               "args": clean}
    if client is not None:
        try:
            message["client"] = check_client(client)
        except RequestRejected as exc:
            raise ProtocolError(f"{op.value} request: {exc.detail}") from exc
    elif op in (Op.CLAIM, Op.RELEASE):
        raise ProtocolError(f"{op.value} request: expected a client identity, got none")
    data = _dumps(message)
    if len(data) > MAX_MESSAGE_BYTES:
        raise ProtocolError(f"{op.value} request: expected at most {MAX_MESSAGE_BYTES} bytes, got {len(data)}")
    return data


def encode_result(msg_id: str, result: Mapping[str, Any]) -> bytes:
    """Build the bytes of a success reply.

    Raises
    ------
    ValueError
        If ``result`` is not JSON-ready (non-finite number, foreign type) or the reply is too
        large; the server then answers ``internal`` instead.
    """
    if not isinstance(result, Mapping):
        raise ValueError(f"result: expected a mapping, got {type(result).__name__}")
    try:
        data = _dumps({"proto": PROTO_VERSION, "msg_id": msg_id, "ok": True, "result": dict(result)})
    except (TypeError, ValueError, RecursionError) as exc:
        raise ValueError(f"result is not JSON-ready: {exc}") from exc
    if len(data) > MAX_MESSAGE_BYTES:
        raise ValueError(f"reply: expected at most {MAX_MESSAGE_BYTES} bytes, got {len(data)}")
    return data


def encode_error(msg_id: str, kind: ErrorKind, detail: str,
                 extra: Mapping[str, Any] | None = None) -> bytes:
    """Build the bytes of an error reply (the detail is cut to 2000 characters); ``extra``
    adds the keys a kind defines (``leased``: ``holder``, ``expires_in_s``)."""
    kind = ErrorKind(kind)
    error = {**dict(extra or {}), "kind": kind.value, "detail": str(detail)[:2000]}
    return _dumps({"proto": PROTO_VERSION, "msg_id": msg_id, "ok": False, "error": error})


# --------------------------------------------------------------------------- server side


def decode_request(data: bytes) -> Request:
    """Read and validate one request.

    Parameters
    ----------
    data : bytes
        The received frame.

    Returns
    -------
    Request
        The validated request.

    Raises
    ------
    RequestRejected
        For any invalid input, with the error kind to answer and the ``msg_id`` if readable.
        Nothing else is raised, whatever ``data`` holds.
    """
    try:
        message = _loads(data)
    except _Invalid as exc:
        raise RequestRejected(ErrorKind.BAD_REQUEST, f"request: {exc}") from exc

    raw_id = message.get("msg_id")
    msg_id = raw_id if isinstance(raw_id, str) and _MSG_ID_RE.fullmatch(raw_id) else ""

    def reject(kind: ErrorKind, detail: str) -> RequestRejected:
        return RequestRejected(kind, detail, msg_id)

    if "proto" not in message:
        raise reject(ErrorKind.BAD_REQUEST, "request: missing key 'proto' (expected the integer 1)")
    proto = message["proto"]
    if not _is_int(proto):
        raise reject(ErrorKind.BAD_REQUEST, f"proto: expected the integer {PROTO_VERSION}, got {_show(proto)}")
    if proto != PROTO_VERSION:
        raise reject(
            ErrorKind.UNSUPPORTED_VERSION, f"proto: expected {PROTO_VERSION}, got {proto}"
        )
    if not msg_id:
        raise reject(
            ErrorKind.BAD_REQUEST, f"msg_id: expected 1-64 lower-case hex characters, got {_show(raw_id)}"
        )
    _check_keys("request", message, required=("proto", "msg_id", "op", "args"),
                optional=("client",), fail=reject)
    raw_op = message["op"]
    if not isinstance(raw_op, str):
        raise reject(ErrorKind.BAD_REQUEST, f"op: expected a string, got {_show(raw_op)}")
    try:
        op = Op(raw_op)
    except ValueError:
        known = ", ".join(o.value for o in Op)
        raise reject(ErrorKind.UNKNOWN_OP, f"op: expected one of {known}, got {_show(raw_op)}") from None
    try:
        args = validate_args(op, message["args"])
        client = check_client(message["client"]) if "client" in message else None
    except RequestRejected as exc:
        raise reject(exc.kind, exc.detail) from None
    if client is None and op in (Op.CLAIM, Op.RELEASE):
        raise reject(ErrorKind.BAD_REQUEST, f"request: {op.value} needs the key 'client' (the "
                                            f"client's identity)")
    return Request(msg_id=msg_id, op=op, args=types.MappingProxyType(args), client=client)


def check_client(value: object) -> str:
    """A client identity (request key ``client``), checked: 1 to 128 printable ASCII
    characters; raises :class:`RequestRejected` (``bad_request``) otherwise."""
    if not isinstance(value, str) or _CLIENT_RE.fullmatch(value) is None:
        raise _bad(ErrorKind.BAD_REQUEST, f"client: expected 1 to 128 printable ASCII "
                                          f"characters, got {_show(value)}")
    return value


def _is_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_number(value: object) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _check_keys(where: str, obj: Mapping[str, Any], *, required: tuple[str, ...],
                optional: tuple[str, ...], fail: Any) -> None:
    if len(obj) == len(required) and all(key in obj for key in required):
        return  # the common case, exactly the required keys
    for key in required:
        if key not in obj:
            raise fail(ErrorKind.BAD_REQUEST, f"{where}: missing key {key!r}")
    allowed = set(required) | set(optional)
    extra = sorted(str(k) for k in obj if k not in allowed)
    if extra:
        expected = ", ".join(sorted(allowed)) or "no keys"
        raise fail(ErrorKind.BAD_REQUEST, f"{where}: unknown key {extra[0]!r} (expected {expected})")


def _bad(kind: ErrorKind, detail: str) -> RequestRejected:
    return RequestRejected(kind, detail)


def _wire_detail(problems: list[Any]) -> str:
    """Every problem :mod:`autotune.schema` found in a message, on one line."""
    return "; ".join(f"{p.key}: expected {p.expected}, got {_show(p.got)}" for p in problems)


_FINITE = schema.number()
_NAME = Annotated[str, Strict(), pydantic.Field(min_length=1), schema.Expect("a non-empty name")]
_SETPOINTS = Annotated[dict[_NAME, _FINITE], pydantic.Field(min_length=1),
                       schema.Expect("an object of name: number, at least one")]
_FIELDS = tuple(f.value for f in Field)


@schema.table
class _NoArgs:
    """``describe``, ``status``, ``safe``, ``release``: no argument."""


@schema.table
class _ApplyArgs:
    setpoints: _SETPOINTS


@schema.table
class _AcquireArgs:
    field: Annotated[Literal[_FIELDS], schema.Expect(" or ".join(repr(f) for f in _FIELDS))]
    ramsey_phase: _FINITE
    shots: schema.integer(1, MAX_SHOTS)


@schema.table
class _TruthArgs:
    setpoints: _SETPOINTS | None = None


@schema.table
class _AdvanceArgs:
    seconds: schema.number(0.0)


@schema.table
class _ThermalStepArgs:
    shift_hz: _FINITE


@schema.table
class _ClaimArgs:
    ttl_s: schema.number(0.0, MAX_LEASE_TTL_S, low_open=True,
                         expected=f"a number of seconds in (0, {MAX_LEASE_TTL_S:g}]")


_ARGS: Mapping[Op, type] = {Op.DESCRIBE: _NoArgs, Op.STATUS: _NoArgs, Op.SAFE: _NoArgs,
                            Op.RELEASE: _NoArgs, Op.APPLY: _ApplyArgs, Op.ACQUIRE: _AcquireArgs,
                            Op.TRUTH: _TruthArgs, Op.ADVANCE: _AdvanceArgs,
                            Op.THERMAL_STEP: _ThermalStepArgs, Op.CLAIM: _ClaimArgs}


def validate_args(op: Op, args: object) -> dict[str, Any]:
    """Check the arguments of one op and return them normalised.

    Parameters
    ----------
    op : Op
        The operation.
    args : object
        The received ``args`` value.

    Returns
    -------
    dict
        A new dict: set-point values and phases as ``float``, ``shots`` as ``int``, ``field`` as
        its string value; an optional argument left out (or null) is not in it.

    Raises
    ------
    RequestRejected
        With kind ``bad_request`` and a detail naming every wrong argument, expected and got.
    """
    if not isinstance(args, Mapping):
        raise _bad(ErrorKind.BAD_REQUEST, f"args: expected an object, got {_show(args)}")
    found = schema.check(_ARGS[Op(op)], args, file="args", prefix="args",
                         error=lambda problems: _bad(ErrorKind.BAD_REQUEST, _wire_detail(problems)))
    return {key: value for key, value in dataclasses.asdict(found).items() if value is not None}


# --------------------------------------------------------------------------- client side


def decode_reply(data: bytes, msg_id: str) -> dict[str, Any]:
    """Read one reply and return its ``result`` object.

    Parameters
    ----------
    data : bytes
        The received frame.
    msg_id : str
        The ``msg_id`` of the request this reply must answer.

    Returns
    -------
    dict
        The ``result`` object of a success reply.

    Raises
    ------
    RigRefused
        For a well-formed error reply (``kind``, ``detail``).
    ProtocolError
        For anything malformed, another version or another ``msg_id``.
    """
    try:
        message = _loads(data)
    except _Invalid as exc:
        raise ProtocolError(f"reply: {exc}") from exc
    proto = message.get("proto")
    if not _is_int(proto) or proto != PROTO_VERSION:
        raise ProtocolError(f"reply proto: expected {PROTO_VERSION}, got {_show(proto)}")
    got_id = message.get("msg_id")
    ok = message.get("ok")
    if not isinstance(ok, bool):
        raise ProtocolError(f"reply ok: expected true or false, got {_show(ok)}")
    required = ("proto", "msg_id", "ok", "result" if ok else "error")
    for key in required:
        if key not in message:
            raise ProtocolError(f"reply: missing key {key!r}")
    extra = sorted(str(k) for k in message if k not in required)
    if extra:
        raise ProtocolError(f"reply: unknown key {extra[0]!r} (expected {', '.join(required)})")
    if not ok:
        error = message["error"]
        if not isinstance(error, dict):
            raise ProtocolError(f"reply error: expected an object, got {_show(error)}")
        kind, detail = error.get("kind"), error.get("detail")
        if not isinstance(kind, str) or kind not in {k.value for k in ErrorKind}:
            raise ProtocolError(f"reply error.kind: expected a known error kind, got {_show(kind)}")
        if not isinstance(detail, str):
            raise ProtocolError(f"reply error.detail: expected a string, got {_show(detail)}")
        # An error answering an unreadable msg_id comes back with "", so it is accepted here.
        if got_id not in (msg_id, ""):
            raise ProtocolError(f"reply msg_id: expected {msg_id!r}, got {_show(got_id)}")
        if kind == ErrorKind.LEASED.value:
            holder, left = error.get("holder"), error.get("expires_in_s")
            raise RigLeased(detail, holder if isinstance(holder, str) else None,
                            float(left) if _is_number(left) and math.isfinite(left) else None)
        raise RigRefused(kind, detail)
    if got_id != msg_id:
        raise ProtocolError(f"reply msg_id: expected {msg_id!r}, got {_show(got_id)}")
    result = message["result"]
    if not isinstance(result, dict):
        raise ProtocolError(f"reply result: expected an object, got {_show(result)}")
    return result


_COUNT = schema.integer(0)
_STRING = Annotated[str, Strict()]
_FLAG = Annotated[bool, Strict()]
_VALUES = Annotated[dict[str, _FINITE], schema.Expect("an object of name: number")]
# Left out, the rig reports no identity; an explicit null is refused.
_INSTANCE = schema.text("1 to 64 characters of [0-9A-Za-z_-]",
                        pattern=r"^[0-9A-Za-z_-]{1,64}$")


def _parsed(cls: type[_T], result: object, where: str) -> _T:
    """A result checked against its table (:mod:`autotune.schema`; keys a newer rig adds are
    ignored); every problem in one :class:`ProtocolError`."""
    if not isinstance(result, Mapping):
        raise ProtocolError(f"{where}: expected an object, got {_show(result)}")
    return schema.check(cls, result, file=where, prefix=where,
                        error=lambda problems: ProtocolError(_wire_detail(problems)))


@dataclass(frozen=True)
class SetpointLimit:
    """Limits of one set-point.

    Attributes
    ----------
    unit : str
        The SI unit of the set-point (``"m/s"``, ``"Hz"``).
    min, max : float
        Inclusive bounds, in ``unit``.
    max_step : float
        Largest allowed change in one ``apply``, in ``unit`` (> 0).
    """

    unit: str
    min: float
    max: float
    max_step: float

    def __post_init__(self) -> None:
        for name in ("min", "max", "max_step"):
            value = getattr(self, name)
            if not _is_number(value) or not math.isfinite(value):
                raise ValueError(f"SetpointLimit.{name}: expected a finite number, got {value!r}")
            object.__setattr__(self, name, float(value))
        if not isinstance(self.unit, str):
            raise ValueError(f"SetpointLimit.unit: expected a string, got {self.unit!r}")
        if self.min > self.max:
            raise ValueError(f"SetpointLimit: expected min <= max, got min={self.min!r}, max={self.max!r}")
        if self.max_step <= 0:
            raise ValueError(f"SetpointLimit.max_step: expected a number > 0, got {self.max_step!r}")

    def tighter(self, other: SetpointLimit) -> SetpointLimit:
        """Return the intersection of two limits (the tighter bound of each).

        Raises
        ------
        ValueError
            If the units differ or the ranges do not overlap.
        """
        if self.unit != other.unit:
            raise ValueError(f"units differ: {self.unit!r} and {other.unit!r}")
        low, high = max(self.min, other.min), min(self.max, other.max)
        if low > high:
            raise ValueError(
                f"ranges [{self.min}, {self.max}] and [{other.min}, {other.max}] do not overlap"
            )
        return SetpointLimit(self.unit, low, high, min(self.max_step, other.max_step))


@schema.table(extra="ignore")
class _Limit:
    unit: _STRING
    min: _FINITE
    max: _FINITE
    max_step: schema.number(0.0, low_open=True)

    def __post_init__(self) -> None:
        if self.min > self.max:
            schema.refuse("max", f"a number >= min = {self.min!r}", self.max)


@dataclass(frozen=True)
class Description:
    """What a rig says about itself (result of ``describe``).

    Attributes
    ----------
    rig : str
        The rig's name.
    proto : int
        Protocol version it speaks.
    simulated : bool
        True for a simulated rig.
    setpoints : Mapping[str, SetpointLimit]
        Limits per set-point name.
    fields : tuple of str
        Field states it can prepare.
    repetition_rate_hz : float
        Shots per second, Hz.
    safe_setpoints : Mapping[str, float]
        The values ``safe`` moves to, in each set-point's unit.
    instance : str or None
        The rig's identity, new at every start (``None`` if the rig does not report one).
    max_shots_per_acquisition : int
        The most shots one ``acquire`` accepts (:data:`MAX_SHOTS` if the rig does not say).
    """

    rig: str
    proto: int
    simulated: bool
    setpoints: Mapping[str, SetpointLimit]
    fields: tuple[str, ...]
    repetition_rate_hz: float
    safe_setpoints: Mapping[str, float]
    instance: str | None = None
    max_shots_per_acquisition: int = MAX_SHOTS


@schema.table(extra="ignore")
class _Described:
    proto: Annotated[schema.integer(PROTO_VERSION, PROTO_VERSION),
                     schema.Expect(f"{PROTO_VERSION}")]
    rig: _STRING
    simulated: _FLAG
    setpoints: Annotated[dict[str, _Limit], schema.Expect("an object of name: limits")]
    fields: Annotated[list[_STRING], schema.Expect("an array of strings")]
    repetition_rate_hz: schema.number(0.0, low_open=True)
    safe_setpoints: _VALUES
    instance: _INSTANCE = None
    max_shots_per_acquisition: schema.integer(1) = MAX_SHOTS


def parse_description(result: Mapping[str, Any]) -> Description:
    """Turn a ``describe`` result into a :class:`Description` (raises ProtocolError)."""
    found = _parsed(_Described, result, "describe result")
    return Description(
        rig=found.rig, proto=found.proto, simulated=found.simulated,
        setpoints=types.MappingProxyType({name: SetpointLimit(
            limit.unit, limit.min, limit.max, limit.max_step)
            for name, limit in found.setpoints.items()}),
        fields=tuple(found.fields), repetition_rate_hz=found.repetition_rate_hz,
        safe_setpoints=types.MappingProxyType(found.safe_setpoints), instance=found.instance,
        max_shots_per_acquisition=found.max_shots_per_acquisition)


@dataclass(frozen=True)
class Applied:
    """Set-points in force after ``apply`` or ``safe``.

    Attributes
    ----------
    setpoints : Mapping[str, float]
        Every set-point in force, in its unit.
    clock : float or None
        Rig clock after the change, s; ``None`` for ``safe``, whose reply has no clock.
    instance : str or None
        The rig's identity, if it reports one.
    """

    setpoints: Mapping[str, float]
    clock: float | None
    instance: str | None = None


@schema.table(extra="ignore")
class _Safe:
    setpoints: _VALUES
    instance: _INSTANCE = None


@schema.table(extra="ignore", kw_only=True)
class _Applied(_Safe):
    clock: _FINITE


def parse_applied(result: Mapping[str, Any]) -> Applied:
    """Turn an ``apply`` result into :class:`Applied` (raises ProtocolError)."""
    found = _parsed(_Applied, result, "apply result")
    return Applied(types.MappingProxyType(found.setpoints), found.clock, found.instance)


def parse_safe(result: Mapping[str, Any]) -> Applied:
    """Turn a ``safe`` result into :class:`Applied` with ``clock=None`` (raises ProtocolError)."""
    found = _parsed(_Safe, result, "safe result")
    return Applied(types.MappingProxyType(found.setpoints), None, found.instance)


@schema.table(extra="ignore")
class Counts:
    """Detected atoms per state.

    Attributes
    ----------
    e, g, i : int
        Atoms assigned to the upper, lower and reference level.
    """

    e: _COUNT
    g: _COUNT
    i: _COUNT

    @property
    def detected(self) -> int:
        """Total detected atoms."""
        return self.e + self.g + self.i


@dataclass(frozen=True)
class Acquisition:
    """Result of ``acquire``.

    Attributes
    ----------
    counts : Counts
        Detected atoms per state.
    shots : int
        Shots (samples) taken.
    t_start, t_end : float
        Rig clock at start and end, s.
    setpoints : Mapping[str, float]
        Set-points in force during the acquisition.
    instance : str or None
        The rig's identity, if it reports one.
    """

    counts: Counts
    shots: int
    t_start: float
    t_end: float
    setpoints: Mapping[str, float]
    instance: str | None = None


@schema.table(extra="ignore")
class _Acquired:
    counts: Annotated[Counts, schema.Expect("an object of e, g, i")]
    shots: schema.integer(1)
    t_start: _FINITE
    t_end: _FINITE
    setpoints: _VALUES
    instance: _INSTANCE = None

    def __post_init__(self) -> None:
        # The rig clock never runs backwards within an acquisition.
        if self.t_end < self.t_start:
            schema.refuse("t_end", f"a time >= t_start = {self.t_start!r}", self.t_end)


def parse_acquisition(result: Mapping[str, Any]) -> Acquisition:
    """Turn an ``acquire`` result into :class:`Acquisition` (raises ProtocolError)."""
    found = _parsed(_Acquired, result, "acquire result")
    return Acquisition(counts=found.counts,
                       shots=found.shots, t_start=found.t_start, t_end=found.t_end,
                       setpoints=types.MappingProxyType(found.setpoints), instance=found.instance)


@dataclass(frozen=True)
class Status:
    """Result of ``status``.

    Attributes
    ----------
    clock : float
        Rig clock, s.
    busy : bool
        True while the rig cannot take requests.
    interlock : str or None
        The interlock set, if any.
    setpoints : Mapping[str, float]
        Set-points in force.
    shots_total : int
        Shots acquired since the rig started.
    instance : str or None
        The rig's identity, if it reports one.
    """

    clock: float
    busy: bool
    interlock: str | None
    setpoints: Mapping[str, float]
    shots_total: int
    instance: str | None = None


@schema.table(extra="ignore")
class _Status:
    clock: _FINITE
    busy: _FLAG
    interlock: Annotated[_STRING | None, schema.Expect("null or a string")]
    setpoints: _VALUES
    shots_total: _COUNT
    instance: _INSTANCE = None


def parse_status(result: Mapping[str, Any]) -> Status:
    """Turn a ``status`` result into :class:`Status` (raises ProtocolError)."""
    found = _parsed(_Status, result, "status result")
    return Status(clock=found.clock, busy=found.busy, interlock=found.interlock,
                  setpoints=types.MappingProxyType(found.setpoints),
                  shots_total=found.shots_total, instance=found.instance)


@schema.table(extra="ignore")
class _Clock:
    clock: _FINITE


@schema.table(extra="ignore", kw_only=True)
class _Truth(_Clock):
    setpoints: _VALUES


@schema.table(extra="ignore", kw_only=True)
class _Stepped(_Clock):
    cavity_offset_hz: _FINITE


def parse_truth(result: Mapping[str, Any]) -> dict[str, Any]:
    """Check a ``truth`` result's outline (set-points, clock) and return it as a dict."""
    _parsed(_Truth, result, "truth result")
    return dict(result)


def parse_advance(result: Mapping[str, Any]) -> dict[str, Any]:
    """Check an ``advance`` result (``clock``) and return it as a dict."""
    _parsed(_Clock, result, "advance result")
    return dict(result)


def parse_thermal_step(result: Mapping[str, Any]) -> dict[str, Any]:
    """Check a ``thermal_step`` result (``clock``, ``cavity_offset_hz``) and return it as a dict."""
    _parsed(_Stepped, result, "thermal_step result")
    return dict(result)


@schema.table(extra="ignore")
class Lease:
    """Result of ``claim``: the lease this client now holds.

    Attributes
    ----------
    holder : str
        The client identity holding it (this client's).
    ttl_s : float
        The lease's time to live, s.
    expires_in_s : float
        Seconds until it runs out unless renewed.
    renewed : bool
        True when this client already held it.
    """

    holder: _STRING
    ttl_s: _FINITE
    expires_in_s: _FINITE
    renewed: _FLAG


@schema.table(extra="ignore")
class _Released:
    released: _FLAG


def parse_claim(result: Mapping[str, Any]) -> Lease:
    """Turn a ``claim`` result into :class:`Lease` (raises ProtocolError)."""
    return _parsed(Lease, result, "claim result")


def parse_release(result: Mapping[str, Any]) -> bool:
    """Turn a ``release`` result into whether a lease was released (raises ProtocolError)."""
    return _parsed(_Released, result, "release result").released
