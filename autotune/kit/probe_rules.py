"""The conformance probe's vocabulary: its rules in the order they run and what each expects,
a rule's finding, the probe's link to the rig (raw frames on its own socket) and a reply as
the probe reads it."""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any, Literal

import zmq

from autotune.wire import protocol
from autotune.wire.keys import CurveClientKeys

__all__ = ["Outcome", "STILL_RULES", "MOVING_RULES", "RULES", "OCCASIONAL_RULES", "EXPECTED",
           "IDENTIFIED_OPS", "SETPOINT_UNITS", "PROBE_OP", "Finding", "Link", "Answer", "number_text",
           "shortened", "raw_request"]


Outcome = Literal["pass", "fail", "warn", "skip"]

#: Rules that need no motion, in the order they run.
STILL_RULES: tuple[str, ...] = (
    "describe", "describe.setpoints", "describe.safe", "describe.fields", "status", "version",
    "unknown_op", "bad_request.json", "bad_request.keys", "bad_request.types", "bad_request.msg_id",
    "bad_request.duplicate", "size_limit", "msg_id.reuse",
)
#: Rules that move the rig, in the order they run.
MOVING_RULES: tuple[str, ...] = (
    "nonfinite", "apply", "apply.full_step", "refuse.out_of_range", "refuse.step", "acquire",
    "replay", "acquire.field", "safe", "lease.claim", "lease.refuse", "lease.safe",
    "lease.release", "lease.expiry",
)
#: Every rule reported at every probe, in the order they are reported.
RULES: tuple[str, ...] = STILL_RULES + MOVING_RULES + ("instance",)
#: Rules reported only when their occasion arises (before ``instance``): ``internal``.
OCCASIONAL_RULES: tuple[str, ...] = ("internal",)

EXPECTED = {
    "describe": "describe answers with rig, proto 1, simulated, setpoints, fields, repetition_rate_hz, safe_setpoints",
    "describe.setpoints": "velocity in m/s and detuning in Hz described, min <= max, max_step > 0",
    "describe.safe": "safe_setpoints names every set-point, within its limits",
    "describe.fields": "fields holds empty and one_photon",
    "status": "status answers clock, busy, interlock, setpoints (the described names), shots_total",
    "version": "proto 2 answered unsupported_version, echoing the msg_id",
    "unknown_op": "an unknown op answered unknown_op, echoing the msg_id",
    "bad_request.json": "a frame that is not JSON answered bad_request with msg_id \"\"",
    "bad_request.keys": "a request without args answered bad_request, echoing the msg_id",
    "bad_request.types": "apply with setpoints that are not an object answered bad_request",
    "bad_request.msg_id": "a msg_id that is not lower-case hex answered bad_request with msg_id \"\"",
    "bad_request.duplicate": "a JSON object with a duplicate key answered bad_request",
    "size_limit": f"a request longer than {protocol.MAX_MESSAGE_BYTES} bytes answered bad_request",
    "msg_id.reuse": "a msg_id reused for another request answered bad_request",
    "nonfinite": "NaN, Infinity, -Infinity, 1e999 in apply answered bad_request; nothing moves",
    "apply": "a step of half max_step is applied; the reply and status show it",
    "apply.full_step": "a step of exactly max_step is accepted",
    "refuse.out_of_range": "a value beyond a limit answered out_of_range naming the set-point; nothing moves",
    "refuse.step": "a step of 1.5 max_step answered out_of_range; nothing moves",
    "acquire": "acquire answers counts e/g/i, the shots asked, a clock that does not go back, the "
               "set-points in force; shots_total grows by the shots",
    "replay": "a repeated msg_id answered with the first reply, executed once (shots_total grows once)",
    "acquire.field": "an unknown field answered bad_request; nothing acquired",
    "safe": "safe answers the described safe set-points; status shows them",
    "lease.claim": "claim grants the lease (holder, ttl_s, expires_in_s, renewed false); a second "
                   "claim renews it (optional feature)",
    "lease.refuse": "another client's claim, apply and acquire answered leased with holder and "
                    "expires_in_s; nothing acquired; its status answered",
    "lease.safe": "another client's safe is executed; the lease stays with its holder",
    "lease.release": "another client's release answered leased; the holder's releases it; then "
                     "the other client claims",
    "lease.expiry": "a lease of 1 s not renewed runs out: another client claims it 1.5 s later",
    "instance": "the same instance in every describe/status/apply/acquire/safe result (optional)",
    "internal": "a request answered internal reaches the rig again when retried with its msg_id "
                "(an internal reply to a request that did not complete is not kept)",
}
IDENTIFIED_OPS = frozenset({"describe", "status", "apply", "acquire", "safe"})
SETPOINT_UNITS = {"velocity": "m/s", "detuning": "Hz"}
PROBE_OP = "no_such_op_from_the_probe"


@dataclass(frozen=True)
class Finding:
    """The outcome of one rule.

    Attributes
    ----------
    rule : str
        The rule's name (see the module docstring).
    outcome : {"pass", "fail", "warn", "skip"}
        What happened.
    expected : str
        What the protocol asks.
    got : str
        What the rig did, where it matters ("" for a plain pass).
    """

    rule: str
    outcome: Outcome
    expected: str
    got: str = ""

    def line(self) -> str:
        """The finding as one printed line."""
        text = f"{self.outcome.upper():<5} {self.rule:<22} expected: {self.expected}"
        return text + (f"; got: {self.got}" if self.got else "")


class Link:
    """A REQ socket to the rig with a bounded wait per exchange; reopened after a missed reply.

    Parameters
    ----------
    endpoint : str
        The rig's endpoint.
    timeout_s : float
        Longest wait for one reply, s.
    curve : CurveClientKeys, optional
        CURVE keys, as for :class:`autotune.wire.bus.BusClient`.
    """

    def __init__(self, endpoint: str, *, timeout_s: float, curve: CurveClientKeys | None = None) -> None:
        self.endpoint = endpoint
        self.timeout_s = timeout_s
        self._curve = curve
        self._context = zmq.Context()
        self._socket: zmq.Socket | None = None

    def _open(self) -> zmq.Socket:
        socket = self._context.socket(zmq.REQ)
        socket.setsockopt(zmq.LINGER, 0)
        socket.setsockopt(zmq.MAXMSGSIZE, 4 * protocol.MAX_MESSAGE_BYTES)
        if self._curve is not None:
            socket.curve_publickey = self._curve.public
            socket.curve_secretkey = self._curve.secret
            socket.curve_serverkey = self._curve.server_public
        socket.connect(self.endpoint)
        return socket

    def exchange(self, data: bytes) -> bytes | None:
        """Send one frame and return the reply frame, or None if none came within the bound."""
        if self._socket is None:
            self._socket = self._open()
        socket = self._socket
        timeout_ms = max(1, int(self.timeout_s * 1000))
        if not socket.poll(timeout_ms, zmq.POLLOUT):
            self.reset()
            return None
        socket.send(data, zmq.NOBLOCK)
        if not socket.poll(timeout_ms, zmq.POLLIN):
            self.reset()  # a REQ socket that missed its reply cannot send again
            return None
        frames = socket.recv_multipart()
        return frames[0] if len(frames) == 1 else b"".join(frames)

    def reset(self) -> None:
        """Close the socket; the next exchange opens a new one."""
        if self._socket is not None:
            self._socket.close(linger=0)
            self._socket = None

    def close(self) -> None:
        """Close the socket and the context. Safe to call twice."""
        self.reset()
        if not self._context.closed:
            self._context.term()


@dataclass(frozen=True)
class Answer:
    """One reply, read strictly with the client's decoder."""

    result: dict[str, Any] | None = None
    kind: str | None = None
    detail: str = ""
    echoed: object = None
    problem: str | None = None
    holder: str | None = None
    expires_in_s: float | None = None

    def show(self) -> str:
        if self.problem is not None:
            return self.problem
        if self.kind is not None:
            return f"error {self.kind} ({shortened(self.detail)})"
        return "an ok reply"


def number_text(value: object) -> str:
    """A set-point value as a person reads it (ten significant digits)."""
    return f"{value:.10g}" if isinstance(value, float) else repr(value)


def shortened(text: str, limit: int = 120) -> str:
    return text if len(text) <= limit else text[: limit - 3] + "..."


def raw_request(op: str, args: Any, msg_id: str, *, proto: Any = protocol.PROTO_VERSION,
             client: str | None = None) -> bytes:
    message = {"proto": proto, "msg_id": msg_id, "op": op, "args": args}
    if client is not None:
        message["client"] = client
    return json.dumps(message).encode()
