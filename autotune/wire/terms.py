"""The protocol's vocabulary (see :mod:`autotune.wire.protocol` for the specification): its
version and limits, the ops, the error kinds, the count fields, a decoded request and the
refusal a rig answers with."""

from __future__ import annotations

import enum
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

__all__ = ["STEP_TOLERANCE", "PROTO_VERSION", "MAX_MESSAGE_BYTES", "MAX_SHOTS", "MAX_LEASE_TTL_S",
           "LEASED_OPS", "Op", "ErrorKind", "Field", "FIELDS", "Request", "RequestRejected"]


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


#: The field states as the strings a driver, the loop, the report and the simulated rig use
#: (the one definition; the lab kit's driver contract re-exports it).
FIELDS: tuple[str, str] = tuple(f.value for f in Field)  # type: ignore[assignment]


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
