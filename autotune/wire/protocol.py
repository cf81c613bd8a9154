"""The wire protocol between autotune and a rig (version 1).

This module is the protocol's specification and the public face of its only implementation in
this project (the vocabulary in :mod:`autotune.wire.terms`, messages as bytes in
:mod:`autotune.wire.codec`, results read into types in :mod:`autotune.wire.results`): the
client (:mod:`autotune.wire.bus`) and the rig server (:mod:`autotune.kit.server`, behind
``autotune serve`` and ``autotune rig``) both import it. A control-system team can implement a rig from
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

autotune claims for :data:`autotune.wire.bus.LEASE_TTL_S` seconds and renews every third of it
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

from autotune.wire.codec import (check_client, decode_reply, decode_request, encode_error,
                                 encode_request, encode_result, new_msg_id, validate_args)
from autotune.wire.results import (Acquisition, Applied, Counts, Description, Lease,
                                   SetpointLimit, Status, parse_acquisition, parse_advance,
                                   parse_applied, parse_claim, parse_description, parse_release,
                                   parse_safe, parse_status, parse_thermal_step, parse_truth)
from autotune.wire.terms import (LEASED_OPS, MAX_LEASE_TTL_S, MAX_MESSAGE_BYTES, MAX_SHOTS,
                                 PROTO_VERSION, STEP_TOLERANCE, ErrorKind, Field, Op, Request,
                                 RequestRejected)

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

