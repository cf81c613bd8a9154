"""The protocol's messages as bytes (see :mod:`autotune.wire.protocol`): strict JSON in and out,
requests and replies built and checked, an op's arguments checked against their table."""

from __future__ import annotations

import dataclasses
import json
import math
import re
import secrets
import types
from collections.abc import Mapping
from typing import Annotated, Any, Literal

import pydantic
from pydantic import Strict

from autotune.schema import is_number
from autotune.errors import ProtocolError, RigLeased, RigRefused, ValueRefused
from autotune import schema
from autotune.wire.terms import (MAX_LEASE_TTL_S, MAX_MESSAGE_BYTES, MAX_SHOTS, PROTO_VERSION,
                                 FIELDS, ErrorKind, Op, Request,
                                 RequestRejected)

__all__ = ["new_msg_id", "encode_request", "encode_result", "encode_error", "decode_request",
           "decode_reply", "validate_args", "check_client", "FINITE", "is_number", "show_value",
           "wire_detail"]


_MSG_ID_RE = re.compile(r"[0-9a-f]{1,64}")
_INSTANCE_RE = re.compile(r"[0-9A-Za-z_-]{1,64}")
_CLIENT_RE = re.compile(r"[ -~]{1,128}")


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


def show_value(value: object) -> str:
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
        raise ProtocolError(f"msg_id: expected 1-64 lower-case hex characters, got {show_value(msg_id)}")
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
        raise ValueRefused(f"result: expected a mapping, got {type(result).__name__}")
    try:
        data = _dumps({"proto": PROTO_VERSION, "msg_id": msg_id, "ok": True, "result": dict(result)})
    except (TypeError, ValueError, RecursionError) as exc:
        raise ValueRefused(f"result is not JSON-ready: {exc}") from exc
    if len(data) > MAX_MESSAGE_BYTES:
        raise ValueRefused(f"reply: expected at most {MAX_MESSAGE_BYTES} bytes, got {len(data)}")
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
        raise reject(ErrorKind.BAD_REQUEST, f"proto: expected the integer {PROTO_VERSION}, got {show_value(proto)}")
    if proto != PROTO_VERSION:
        raise reject(
            ErrorKind.UNSUPPORTED_VERSION, f"proto: expected {PROTO_VERSION}, got {proto}"
        )
    if not msg_id:
        raise reject(
            ErrorKind.BAD_REQUEST, f"msg_id: expected 1-64 lower-case hex characters, got {show_value(raw_id)}"
        )
    _check_keys("request", message, required=("proto", "msg_id", "op", "args"),
                optional=("client",), fail=reject)
    raw_op = message["op"]
    if not isinstance(raw_op, str):
        raise reject(ErrorKind.BAD_REQUEST, f"op: expected a string, got {show_value(raw_op)}")
    try:
        op = Op(raw_op)
    except ValueError:
        known = ", ".join(o.value for o in Op)
        raise reject(ErrorKind.UNKNOWN_OP, f"op: expected one of {known}, got {show_value(raw_op)}") from None
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
                                          f"characters, got {show_value(value)}")
    return value


def _is_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


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


def wire_detail(problems: list[Any]) -> str:
    """Every problem :mod:`autotune.schema` found in a message, on one line."""
    return "; ".join(f"{p.key}: expected {p.expected}, got {show_value(p.got)}" for p in problems)


FINITE = schema.number()
_NAME = Annotated[str, Strict(), pydantic.Field(min_length=1), schema.Expect("a non-empty name")]
_SETPOINTS = Annotated[dict[_NAME, FINITE], pydantic.Field(min_length=1),
                       schema.Expect("an object of name: number, at least one")]
_FIELDS = FIELDS


@schema.table
class _NoArgs:
    """``describe``, ``status``, ``safe``, ``release``: no argument."""


@schema.table
class _ApplyArgs:
    setpoints: _SETPOINTS


@schema.table
class _AcquireArgs:
    field: Annotated[Literal[_FIELDS], schema.Expect(" or ".join(repr(f) for f in _FIELDS))]
    ramsey_phase: FINITE
    shots: schema.integer(1, MAX_SHOTS)


@schema.table
class _TruthArgs:
    setpoints: _SETPOINTS | None = None


@schema.table
class _AdvanceArgs:
    seconds: schema.number(0.0)


@schema.table
class _ThermalStepArgs:
    shift_hz: FINITE


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
        raise _bad(ErrorKind.BAD_REQUEST, f"args: expected an object, got {show_value(args)}")
    found = schema.check(_ARGS[Op(op)], args, file="args", prefix="args",
                         error=lambda problems: _bad(ErrorKind.BAD_REQUEST, wire_detail(problems)))
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
        raise ProtocolError(f"reply proto: expected {PROTO_VERSION}, got {show_value(proto)}")
    got_id = message.get("msg_id")
    ok = message.get("ok")
    if not isinstance(ok, bool):
        raise ProtocolError(f"reply ok: expected true or false, got {show_value(ok)}")
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
            raise ProtocolError(f"reply error: expected an object, got {show_value(error)}")
        kind, detail = error.get("kind"), error.get("detail")
        if not isinstance(kind, str) or kind not in {k.value for k in ErrorKind}:
            raise ProtocolError(f"reply error.kind: expected a known error kind, got {show_value(kind)}")
        if not isinstance(detail, str):
            raise ProtocolError(f"reply error.detail: expected a string, got {show_value(detail)}")
        # An error answering an unreadable msg_id comes back with "", so it is accepted here.
        if got_id not in (msg_id, ""):
            raise ProtocolError(f"reply msg_id: expected {msg_id!r}, got {show_value(got_id)}")
        if kind == ErrorKind.LEASED.value:
            holder, left = error.get("holder"), error.get("expires_in_s")
            raise RigLeased(detail, holder if isinstance(holder, str) else None,
                            float(left) if is_number(left) and math.isfinite(left) else None)
        raise RigRefused(kind, detail)
    if got_id != msg_id:
        raise ProtocolError(f"reply msg_id: expected {msg_id!r}, got {show_value(got_id)}")
    result = message["result"]
    if not isinstance(result, dict):
        raise ProtocolError(f"reply result: expected an object, got {show_value(result)}")
    return result
