"""The night's time (:class:`NightClock`): its ends in rig and wall time, and the waits for
the rig's clock (a simulated rig's clock moved on, a real rig's waited for in wall time)."""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from datetime import datetime, timedelta
from typing import Any

from autotune.config import RunConfig
from autotune.errors import Interrupted
from autotune.run.session import Session
from autotune.wire.rig import Rig
from autotune.run.night_ledger import NightLedger

__all__ = ["NightClock", "parse_wall"]

# Longest single wall-clock wait on a real rig between reads of its clock (s).
_WALL_POLL_S = 30.0

def parse_wall(text: Any) -> float | None:
    try:
        return datetime.fromisoformat(str(text)).timestamp()
    except (TypeError, ValueError):
        return None


class NightClock:
    """The night's time: its ends in rig and wall time, and the waits for the rig's clock.

    The rig clock is the reference: a simulated rig's virtual clock is moved on with its
    ``advance`` op; a real rig is waited for in wall time, interruptibly, its clock read with
    ``status`` (at most every ``_WALL_POLL_S``).
    """

    def __init__(self, session: Session, rig: Rig, config: RunConfig, ledger: NightLedger, *,
                 start_clock: float, start_wall: float, simulated: bool,
                 wall: Callable[[], float], find: Callable[..., Mapping[str, Any] | None],
                 tell: Callable[..., None]) -> None:
        self.session, self.rig, self.config, self.ledger = session, rig, config, ledger
        self.start_clock, self.start_wall = start_clock, start_wall
        self.simulated, self.wall, self._find, self._tell = simulated, wall, find, tell
        self.wall_end = self._wall_end()

    def _wall_end(self) -> float | None:
        t = self.config.track
        ends = []
        if t.max_wall_time_s > 0:
            ends.append(self.start_wall + t.max_wall_time_s)
        minutes = t.end_at_minutes
        if minutes is not None:
            ends.append(self.local_end(self.start_wall, minutes))
        return min(ends) if ends else None

    @staticmethod
    def local_end(start_wall: float, minutes: int) -> float:
        """The first local time ``minutes`` after midnight that comes after ``start_wall``."""
        began = datetime.fromtimestamp(start_wall)
        at = began.replace(hour=minutes // 60, minute=minutes % 60, second=0, microsecond=0)
        if at <= began:
            at += timedelta(days=1)
        return at.timestamp()

    @property
    def rig_end(self) -> float | None:
        """Rig clock of the night's end (None: no end in rig time)."""
        t = self.config.track
        return self.start_clock + t.max_rig_time_s if t.max_rig_time_s > 0 else None

    def remaining_s(self) -> float | None:
        """Rig time to the night's end (a real rig's clock runs with the wall clock), or None."""
        remaining = None
        if self.rig_end is not None:
            remaining = self.rig_end - self.session.clock
        if self.wall_end is not None:
            ahead = max(self.wall_end - self.wall(), 0.0)
            remaining = ahead if remaining is None else min(remaining, ahead)
        return remaining

    def end_reason(self) -> str | None:
        """Why the night ends now, or None."""
        t = self.config.track
        if self.rig_end is not None and self.session.clock >= self.rig_end - 1e-6:
            return (f"end of the night: {t.max_rig_time_s / 3600:.2f} h of rig time since it "
                    f"began (track.max_rig_time_s)")
        if self.wall_end is not None and self.wall() >= self.wall_end:
            which = "track.max_wall_time_s" if t.max_wall_time_s > 0 else \
                f"track.end_at_local_time {t.end_at_local_time}"
            return f"end of the night in wall time ({which})"
        return None

    def bounded(self, clock: float) -> float:
        """``clock``, at most the night's end in rig time."""
        return min(clock, self.rig_end) if self.rig_end is not None else clock

    def read(self) -> float:
        """The rig's clock (``status``), s."""
        status = self.session._call("status", lambda _id: self.rig.status())
        self.session.clock = max(self.session.clock, float(status.clock))
        return float(status.clock)

    def wait_until(self, until: float, reason: str, **key: int) -> None:
        """Wait until the rig clock reaches ``until`` (write-ahead ``wait`` record, named by
        ``key``: the next check's ``point`` or a ``retry``)."""
        now = self.read()
        if until <= now + 1e-6:
            return
        if self._find("wait", **key) is None:
            self.ledger.append("wait", **key, from_clock=now, until_clock=until,
                               reason=reason, how="advance" if self.simulated else "wall")
        self._tell("wait", next_in_s=until - now)
        if self.simulated:
            def advance(_msg_id: str) -> Any:
                # Recomputed at each attempt from the rig's own clock: a retried advance never
                # moves the clock twice.
                status = self.rig.status()
                remaining = until - float(status.clock)
                return self.rig.advance(remaining) if remaining > 0 else {"clock": status.clock}

            self.session._check_stop()
            reply = self.session._call("advance", advance)
            self.session.clock = max(self.session.clock, float(reply["clock"]))
            return
        began, start_clock = time.monotonic(), now
        while now < until - 1e-6:
            remaining = until - now
            if self.wall_end is not None:
                remaining = min(remaining, max(self.wall_end - self.wall(), 0.0))
            if self.session.stop.wait(min(max(remaining, 0.0), _WALL_POLL_S)):
                raise Interrupted("stopped by signal while waiting for the next check")
            if self.wall_end is not None and self.wall() >= self.wall_end:
                return
            now = self.read()
            if time.monotonic() - began > 2.0 * (until - start_clock) + 60.0:
                self.session.decide("clock", f"the rig clock advanced {now - start_clock:.0f} s "
                                    f"in {time.monotonic() - began:.0f} s of wall time: not "
                                    f"waiting longer for it", until_clock=until, clock=now)
                return
