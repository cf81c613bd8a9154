"""The seam between the closed loop and an apparatus.

The loop talks to "a rig" only through :class:`Rig`: five operations that mirror the wire
protocol's ops of the same names. An implementation checks each reply against what it applied
(:class:`autotune.errors.RigMismatch`, :class:`autotune.errors.RigRestarted`); ``describe``
(re)starts that watch. :class:`autotune.wire.bus.BusClient` is the implementation used
against every real or simulated rig; tests may pass any other object with these methods.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING, Protocol, runtime_checkable

if TYPE_CHECKING:
    from autotune.wire.protocol import Acquisition, Applied, Description, Status

from autotune.wire.terms import FIELDS

__all__ = ["Rig", "FIELDS", "measurement_shots"]


def measurement_shots(phases: int, shots_per_phase: int) -> int:
    """Shots of one measurement: every field state (:data:`FIELDS`, in the order the loop
    interleaves them) at each of ``phases`` Ramsey phases, ``shots_per_phase`` each (the one
    place that says a measurement costs ``2 * phases * shots_per_phase``)."""
    return len(FIELDS) * phases * shots_per_phase


@runtime_checkable
class Rig(Protocol):
    """What the loop needs of an apparatus (all quantities SI, set-points in the rig's units)."""

    def describe(self) -> Description:
        """The rig's name, set-point limits, field states and repetition rate."""
        ...

    def apply(self, setpoints: Mapping[str, float], *, msg_id: str | None = None) -> Applied:
        """Apply set-points (each change within its largest step) and return those in force.

        ``msg_id`` repeats an earlier request (the rig answers it from its replay cache if it
        executed it already); by default a new one is drawn.
        """
        ...

    def acquire(self, field: str, ramsey_phase: float, shots: int, *,
                msg_id: str | None = None, resend: bool = False) -> Acquisition:
        """Run ``shots`` samples with field state ``field`` at ``ramsey_phase`` (rad).

        ``resend`` says the request may have been executed before this process started (its
        reply may come from the replay cache, with an earlier clock).
        """
        ...

    def status(self) -> Status:
        """The rig clock (s), busy flag, interlock (``None`` or its reason) and set-points."""
        ...

    def safe(self, *, msg_id: str | None = None) -> Applied:
        """Send the rig to its safe set-points."""
        ...
