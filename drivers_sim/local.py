"""The simulated rig in this process, spoken to through the wire protocol without a socket.

:class:`LocalRig` offers the methods of :class:`autotune.bus.BusClient` (the ``Rig`` interface
plus the simulated-only ``truth``, ``advance`` and ``thermal_step``). Each call is encoded as a
protocol request, answered by :meth:`drivers_sim.server.RigServer.handle` (validation, error
kinds, replay cache) and decoded by the client-side parsers of :mod:`autotune.protocol`, so
only the ZeroMQ transport is left out. Benchmark studies that run hundreds of simulated
calibrations use it; integration tests and dry runs use the real bus.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

from autotune import protocol
from autotune.protocol import Acquisition, Applied, Description, Op, Status
from drivers_sim.rig import SimulatedRig
from drivers_sim.server import FaultConfig, RigServer

__all__ = ["LocalRig"]


class LocalRig:
    """A :class:`SimulatedRig` behind the protocol's encoder, server handler and parsers.

    Parameters
    ----------
    rig : SimulatedRig
        The simulated rig to serve.
    """

    def __init__(self, rig: SimulatedRig) -> None:
        self.sim = rig
        # Never started: only its request handler is used, so no socket is opened.
        self._server = RigServer(rig, "inproc://local-rig", faults=FaultConfig())

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
        """The noiseless truth at ``setpoints`` (default: those in force)."""
        args = {} if setpoints is None else {"setpoints": dict(setpoints)}
        return self._call(Op.TRUTH, args, protocol.parse_truth)

    def advance(self, seconds: float) -> dict[str, Any]:
        """Move the virtual clock on (s)."""
        return self._call(Op.ADVANCE, {"seconds": float(seconds)}, protocol.parse_advance)

    def thermal_step(self, shift_hz: float) -> dict[str, Any]:
        """Shift the cavity frequency at once (Hz)."""
        return self._call(Op.THERMAL_STEP, {"shift_hz": float(shift_hz)},
                          protocol.parse_thermal_step)

    def close(self) -> None:
        """Nothing to release (present for symmetry with the bus client)."""

    def __enter__(self) -> LocalRig:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
