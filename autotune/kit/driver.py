"""The rig-driver interface: the one class a lab writes to connect its control system.

``autotune serve --config DRIVER.toml`` loads a driver class named ``module:Class`` in that
file and serves it over the wire protocol (:mod:`autotune.wire.protocol`). The server does all the
protocol work: message checks, the replay cache for repeated ``msg_id``, error replies, CURVE
access control, the rig identity, and the **limit and step checks, before the driver is
called**. It also translates set-points: the driver never sees ``velocity`` in m/s or
``detuning`` in Hz, but the lab's own channels in the lab's own units, through the channel map
of ``DRIVER.toml`` (:mod:`autotune.kit.channels`).

A driver is any class with these methods (no base class needed)::

    class MyDriver:
        def __init__(self, **options): ...        # the [driver.options] table of DRIVER.toml;
                                                  # connect here, with bounded waits

        def describe(self) -> dict:
            return {"rig": "bench-7",              # the rig's name
                    "repetition_rate_hz": 150.0,   # shots per second
                    "channels": {                  # every channel the map may use
                        "STARK:HV1": {"unit": "V"},               # unit required
                        "VSEL:AOM": {"unit": "MHz", "min": 80.0, "max": 120.0,
                                     "max_step": 2.0, "safe": 100.0},   # limits optional
                    },
                    # optional: "simulated": False, "max_shots_per_acquisition": 100000
                    }

        def apply(self, channels: dict[str, float]) -> None:
            ...  # set these channels (already checked); return once they have settled

        def acquire(self, field: str, ramsey_phase: float, shots: int) -> dict:
            # field "empty" or "one_photon", ramsey_phase in rad
            return {"counts": {"e": 12, "g": 30, "i": 41},   # detected atoms per state
                    "t_start": 10.0, "t_end": 10.7}          # rig clock, s

        def status(self) -> dict:
            return {"clock": 10.7,                 # rig clock, s (never goes back)
                    "busy": False,
                    "interlock": None,             # or a string saying which interlock is set
                    "channels": {"STARK:HV1": 3.01, "VSEL:AOM": 101.5},   # read-backs
                    "shots_total": 1234}           # every shot since the driver started

        def safe(self, channels: dict[str, float]) -> None:
            ...  # go to these safe values by the rig's own safe procedure: no step limit,
                 # also while an interlock is set

        def close(self) -> None: ...               # optional: called once when the server stops

Refusals: raise :class:`OutOfRange`, :class:`Busy`, :class:`InterlockSet` or
:class:`BadRequest` (from this module) with a message saying what was wrong, expected and
received; nothing may have been done then. Any other exception is answered ``internal`` and
logged with its traceback; the server keeps running.

What the server guarantees a driver
-----------------------------------
- ``apply`` gets only channels of the map, finite values within the limits of both units,
  each at most its largest step from the value in force, and only while ``status`` reports
  neither busy nor an interlock.
- A request repeated with the same ``msg_id`` is answered from the cache: ``apply`` and
  ``acquire`` are never called twice for one request.
- Calls never overlap: one request at a time, in the server's thread.

Optional simulated-rig operations: a driver of a *simulated* rig may also offer ``truth(setpoints
or None)``, ``advance(seconds)`` and ``thermal_step(shift_hz)``, in the protocol's own units,
returning the protocol's result dicts; the server then serves the ops of the same names.
Otherwise they are answered ``unknown_op``, as the protocol says of a real rig.

A driver class may define a class method ``from_config(options, config_dir)`` to be built
from the ``[driver.options]`` table and the folder of ``DRIVER.toml`` (to resolve relative
paths); otherwise it is called as ``Class(**options)``. A ``from_config`` refuses options it
does not take by raising TypeError itself (``autotune serve`` exits 2 then, as for options that
do not fit ``__init__``); anything else it raises is a failure to start (exit 3).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, Protocol, runtime_checkable

from autotune.errors import BadRequest, Busy, DriverRefusal, InterlockSet, OutOfRange
from autotune.wire.terms import FIELDS  # field states ``acquire`` prepares in the cavity

__all__ = [
    "RigDriver",
    "DriverRefusal",
    "OutOfRange",
    "Busy",
    "InterlockSet",
    "BadRequest",
    "COUNT_STATES",
    "FIELDS",
    "SIMULATED_OPS",
]

#: Detected states of an acquisition's ``counts`` (upper, lower and reference level).
COUNT_STATES: tuple[str, str, str] = ("e", "g", "i")


#: Methods a simulated rig's driver may add; each is served as the protocol op of its name.
SIMULATED_OPS: tuple[str, str, str] = ("truth", "advance", "thermal_step")


@runtime_checkable
class RigDriver(Protocol):
    """What ``autotune serve`` needs of a lab's control system, in the lab's own channels.

    All values cross this interface in each channel's own unit (as declared by ``describe``);
    times are seconds of the rig's clock and phases radians.
    """

    def describe(self) -> Mapping[str, Any]:
        """Name, repetition rate (Hz), channels with their units (and optional limits)."""
        ...

    def apply(self, channels: Mapping[str, float]) -> None:
        """Set the given channels (checked by the server) and return once they settled."""
        ...

    def acquire(self, field: str, ramsey_phase: float, shots: int) -> Mapping[str, Any]:
        """Run ``shots`` samples; return ``counts`` (e, g, i), ``t_start`` and ``t_end`` (s)."""
        ...

    def status(self) -> Mapping[str, Any]:
        """Clock (s), busy flag, interlock (None or its name), channel read-backs, shot total."""
        ...

    def safe(self, channels: Mapping[str, float]) -> None:
        """Go to these safe channel values by the rig's own safe procedure."""
        ...
