"""The client's side of the rig's lease: who this client is, whether a holder's process is
gone, and the thread that renews a lease while the process lives."""

from __future__ import annotations

import os
import re
import threading
from socket import gethostname
from typing import Any

import zmq
import zmq.auth

from autotune.wire import protocol
from autotune.errors import ProtocolError, RigRefused
from autotune.wire.protocol import Op
from autotune.wire.keys import CurveClientKeys

__all__ = ["LEASE_TTL_S", "LeaseKeeper", "client_identity", "holder_gone"]


LEASE_TTL_S = 20.0
"""Time to live of the lease autotune claims, s: renewed every third of it while the process
lives, so a client that dies frees the rig within this time."""


def client_identity(command: str) -> str:
    """This process as a lease holder: ``USER@HOST pid PID (COMMAND)``, printable ASCII."""
    try:
        user = os.getlogin()
    except OSError:
        user = os.environ.get("USER") or os.environ.get("LOGNAME") or str(os.getuid())
    text = f"{user}@{gethostname()} pid {os.getpid()} ({command})"
    return "".join(c if " " <= c <= "~" else "?" for c in text)[:128]


_IDENTITY_RE = re.compile(r"[^@]*@(?P<host>\S+) pid (?P<pid>\d+) \(")


def holder_gone(holder: str | None) -> bool:
    """True for a holder identity of :func:`client_identity` naming a process of this host
    that no longer runs."""
    match = _IDENTITY_RE.match(holder or "")
    if match is None or match["host"] != gethostname():
        return False
    try:
        os.kill(int(match["pid"]), 0)
    except ProcessLookupError:
        return True
    except (PermissionError, OverflowError, ValueError):
        return False
    return False



class LeaseKeeper:
    """Renews a lease from its own thread and socket (a client's socket is not thread-safe)."""

    def __init__(self, context: zmq.Context, endpoint: str, curve: CurveClientKeys | None,
                 client: str, ttl_s: float, timeout_s: float, log: Any) -> None:
        self._context, self._endpoint, self._curve = context, endpoint, curve
        self._client, self._ttl_s, self._log = client, ttl_s, log
        self._timeout_ms = max(1, int(round(min(timeout_s, ttl_s / 3) * 1000)))
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="lease-keeper", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join()

    def exchange_once(self, data: bytes) -> bytes | None:
        """Send one request on a fresh socket and wait one bound for its reply."""
        socket = self._context.socket(zmq.REQ)
        try:
            socket.setsockopt(zmq.LINGER, 0)
            socket.setsockopt(zmq.RCVTIMEO, self._timeout_ms)
            socket.setsockopt(zmq.SNDTIMEO, self._timeout_ms)
            if self._curve is not None:
                socket.curve_publickey = self._curve.public
                socket.curve_secretkey = self._curve.secret
                socket.curve_serverkey = self._curve.server_public
            socket.connect(self._endpoint)
            socket.send(data)
            return socket.recv()
        except zmq.ZMQError:
            return None
        finally:
            socket.close(linger=0)

    def _run(self) -> None:
        while not self._stop.wait(self._ttl_s / 3):
            msg_id = protocol.new_msg_id()
            data = protocol.encode_request(Op.CLAIM, {"ttl_s": self._ttl_s}, msg_id,
                                           client=self._client)
            reply = self.exchange_once(data)
            if reply is None:
                # Usually the rig is busy with this client's own long request, whose end renews
                # the lease on the rig's side.
                self._log.info("lease_not_renewed", reason="no reply; trying again")
                continue
            try:
                protocol.decode_reply(reply, msg_id)
            except RigRefused as exc:
                self._log.error("lease_lost", kind=exc.kind, detail=exc.detail,
                                consequence="the rig refuses this client's moves and "
                                            "acquisitions from now on")
                if exc.kind == "leased":
                    return
            except ProtocolError as exc:
                self._log.warning("lease_not_renewed", reason=str(exc))
