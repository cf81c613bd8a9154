"""The rig's lease: which client may move it and acquire, and until when (pure, no I/O).

:class:`LeaseBook` is the server's side of the protocol's *One driver at a time*
(:mod:`autotune.wire.protocol`): one holder at most, a time to live renewed by claiming again, an
end by ``release`` or by running out. :class:`autotune.kit.server.RigServer` asks it before it
executes a request; the book never touches the rig.

Times are read from a monotonic clock (a wall clock that jumps neither shortens nor extends a
lease); the wall clock only dates the end of a lease for a person reading the refusal.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime

from autotune.wire.protocol import LEASED_OPS, Op

__all__ = ["LeaseBook", "LeaseHeld", "Holder"]


@dataclass(frozen=True)
class Holder:
    """The client holding the lease and when its lease runs out (monotonic seconds)."""

    client: str
    ttl_s: float
    expires_at: float


class LeaseHeld(Exception):
    """Another client holds the lease; the server answers ``leased`` with this message.

    Attributes
    ----------
    holder : str
        The holding client's identity.
    expires_in_s : float
        Seconds until its lease runs out unless renewed.
    """

    def __init__(self, holder: str, expires_in_s: float, until: str) -> None:
        self.holder = holder
        self.expires_in_s = expires_in_s
        super().__init__(f"rig leased by {holder} for another {expires_in_s:.1f} s (until "
                         f"{until} unless renewed); nothing was done")


class LeaseBook:
    """Who holds the rig.

    Parameters
    ----------
    clock : callable, optional
        Monotonic seconds (default :func:`time.monotonic`).
    wall : callable, optional
        Wall-clock seconds since the epoch, only to date a lease's end in words (default
        :func:`time.time`).
    """

    def __init__(self, clock: Callable[[], float] = time.monotonic,
                 wall: Callable[[], float] = time.time) -> None:
        self._clock = clock
        self._wall = wall
        self._holder: Holder | None = None

    def holder(self) -> Holder | None:
        """The holder of a lease that has not run out, else None."""
        if self._holder is not None and self._clock() >= self._holder.expires_at:
            self._holder = None
        return self._holder

    def _refusal(self, holder: Holder) -> LeaseHeld:
        left = max(0.0, holder.expires_at - self._clock())
        until = datetime.fromtimestamp(self._wall() + left, UTC).isoformat(timespec="seconds")
        return LeaseHeld(holder.client, left, until)

    def claim(self, client: str, ttl_s: float) -> dict[str, object]:
        """Give the lease to ``client`` for ``ttl_s`` s, or renew it; the ``claim`` result.

        Raises
        ------
        LeaseHeld
            Another client holds it.
        """
        held = self.holder()
        if held is not None and held.client != client:
            raise self._refusal(held)
        self._holder = Holder(client, float(ttl_s), self._clock() + float(ttl_s))
        return {"holder": client, "ttl_s": float(ttl_s), "expires_in_s": float(ttl_s),
                "renewed": held is not None}

    def renew_if_held(self, client: str) -> None:
        """Restart the time to live of ``client``'s lease, if it holds one (the end of one of
        its requests counts as a claim: a request longer than the ttl never loses it)."""
        held = self._holder
        if held is not None and held.client == client:
            self._holder = Holder(client, held.ttl_s, self._clock() + held.ttl_s)

    def release(self, client: str) -> dict[str, object]:
        """End ``client``'s lease; the ``release`` result (``released`` false if it held none).

        Raises
        ------
        LeaseHeld
            Another client holds it.
        """
        held = self.holder()
        if held is None:
            return {"released": False}
        if held.client != client:
            raise self._refusal(held)
        self._holder = None
        return {"released": True}

    def check(self, op: Op, client: str | None) -> None:
        """Let ``op`` from ``client`` through, or refuse it.

        Raises
        ------
        LeaseHeld
            ``op`` moves the rig or acquires and another client (or one without an identity)
            holds the lease.
        """
        if op not in LEASED_OPS:
            return
        held = self.holder()
        if held is not None and held.client != client:
            raise self._refusal(held)
