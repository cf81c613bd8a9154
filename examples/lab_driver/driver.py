"""An example rig driver: the one class a lab writes to let autotune drive its rig.

Copy this folder, replace ``instruments`` by your control system's libraries, keep the five
methods. The driver speaks only in your channels and your units; ``DRIVER.toml`` maps
autotune's set-points (``velocity`` in m/s, ``detuning`` in Hz) onto them, and ``autotune
serve`` checks limits and steps in both units *before* any of these methods is called (see
:mod:`autotune.driver` for the whole contract).

The channels of this rig:

``VSEL:AOM_MHZ`` (MHz)
    Frequency of the acousto-optic modulator of the velocity-selection laser: the selected
    velocity is linear in it (``DRIVER.toml``: ``law = "linear"``).
``STARK:HV1`` (V)
    Voltage of the Stark-tuning electrode supply's output HV1: the detuning follows the
    quadratic Stark law around the bias field (``law = "stark"``, positive branch).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

# The vocabulary of refusals: the server turns each into the protocol's error kind. Anything
# else a method raises is answered "internal" and logged with its traceback.
from autotune.driver import BadRequest, Busy, InterlockSet, OutOfRange

from .instruments import (
    ElectrodeSupply,
    InstrumentError,
    Sequencer,
    SequencerBusy,
    SupplyInterlockOpen,
    SupplyRangeError,
)

__all__ = ["LabDriver"]

AOM = "VSEL:AOM_MHZ"
ELECTRODE = "STARK:HV1"


class LabDriver:
    """The example rig's driver (see the module docstring).

    Parameters
    ----------
    supply_address : str
        Address of the electrode supply.
    sequencer_address : str
        Address of the timing sequencer.
    seed : int
        Seed of the made-up instruments' counting noise (a real driver has no such option).
    """

    def __init__(self, supply_address: str, sequencer_address: str, seed: int = 0) -> None:
        # [driver.options] of DRIVER.toml arrive here as keyword arguments. Connect to the
        # instruments now: a failure here stops `autotune serve` at start-up (exit 3) rather
        # than at the first request.
        self.supply = ElectrodeSupply(supply_address)
        self.sequencer = Sequencer(sequencer_address, supply=self.supply, seed=seed)

    def describe(self) -> dict[str, Any]:
        """The rig's name, its rate and its channels, in their own units.

        Limits given here are the control system's own; DRIVER.toml may narrow them (never
        widen them: every limit holds at once). A channel may give its unit only.
        """
        return {
            "rig": "bench-2",
            "simulated": False,   # made-up instruments, but this is the template of a real rig
            "repetition_rate_hz": self.sequencer.repetition_rate_hz,
            "max_shots_per_acquisition": 60_000,   # about 7 min of samples: one bounded request
            "channels": {
                AOM: {"unit": "MHz", "min": 90.0, "max": 140.0, "max_step": 2.0, "safe": 111.0},
                ELECTRODE: {"unit": "V", "min": 0.0, "max": 5.0, "max_step": 0.1, "safe": 3.0},
            },
        }

    def apply(self, channels: Mapping[str, float]) -> None:
        """Set the channels asked for; return once they have settled.

        The server only passes channels of the map, within both units' limits and steps, and
        only while status() reports neither busy nor an interlock. Still translate what the
        instruments say, since the rig can change between the check and the call.
        """
        try:
            for channel, value in channels.items():
                if channel == AOM:
                    self.sequencer.write_register("AOM_VSEL", value)
                elif channel == ELECTRODE:
                    self.supply.set_voltage("HV1", value)
                else:
                    raise BadRequest(f"{channel}: expected one of {AOM}, {ELECTRODE}, got {channel!r}")
        except SupplyInterlockOpen as exc:
            raise InterlockSet(f"electrode supply interlock open: {exc}") from exc
        except SupplyRangeError as exc:
            raise OutOfRange(f"{ELECTRODE}: {exc}") from exc
        except SequencerBusy as exc:
            raise Busy(f"sequencer busy with {exc}") from exc

    def acquire(self, field: str, ramsey_phase: float, shots: int) -> dict[str, Any]:
        """Run ``shots`` samples and return the counts per atomic level and the rig times.

        ``field`` is "empty" or "one_photon" (the server checked it), ``ramsey_phase`` is in
        radians: convert to whatever the instrument wants (degrees here).
        """
        started = self.sequencer.time_s()
        try:
            histogram = self.sequencer.run(shots, photon=field == "one_photon",
                                           ramsey_phase_deg=math.degrees(ramsey_phase))
        except SequencerBusy as exc:
            raise Busy(f"sequencer busy with {exc}") from exc
        # The detectors' names for the levels are the lab's; the protocol's are e, g, i.
        counts = {"e": histogram["upper"], "g": histogram["lower"], "i": histogram["reference"]}
        return {"counts": counts, "t_start": started, "t_end": self.sequencer.time_s()}

    def status(self) -> dict[str, Any]:
        """Clock, busy, interlock, read-backs of every channel, shots since start.

        Read the channels back from the hardware, not from what was last sent: the server
        reports the set-points from these read-backs (and the commanded values while they
        agree within DRIVER.toml's channel_readback_tolerance).
        """
        return {
            "clock": self.sequencer.time_s(),
            "busy": self.sequencer.busy_with is not None,
            "interlock": self.supply.interlock(),
            "channels": {AOM: self.sequencer.read_register("AOM_VSEL"),
                         ELECTRODE: self.supply.read_voltage("HV1")},
            "shots_total": self.sequencer.shots_done(),
        }

    def safe(self, channels: Mapping[str, float]) -> None:
        """Go to these safe values by the rig's own safe procedure.

        No step limit applies, and it must work while an interlock is set as far as the
        hardware allows: here the supply cannot move under interlock, so it is left where it
        is (holding its voltage is this supply's safe state) and the AOM is still set.
        """
        failures = []
        for channel, value in channels.items():
            try:
                if channel == AOM:
                    self.sequencer.write_register("AOM_VSEL", value)
                elif channel == ELECTRODE and self.supply.interlock() is None:
                    self.supply.set_voltage("HV1", value)
            except InstrumentError as exc:
                failures.append(f"{channel}: {exc}")
        if failures:
            # Not a refusal: the safe procedure failed, which the operator must see (internal).
            raise RuntimeError("safe procedure incomplete: " + "; ".join(failures))

    def close(self) -> None:
        """Called once when the server stops: release the instruments."""
        self.sequencer.disconnect()
        self.supply.disconnect()
