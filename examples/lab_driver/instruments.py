"""A made-up instrument API, standing in for a lab's own control-system libraries.

Nothing here talks to hardware: both instruments live in memory, keep a virtual clock, and
behave the way the driver in ``driver.py`` must be ready for (a read-back quantised to the
supply's resolution, its own range check, an interlock input, a busy sequencer). A lab replaces
this module with its real libraries and keeps the driver's shape.

:class:`ElectrodeSupply`
    A two-output high-voltage supply for the Stark-tuning electrodes. ``set_voltage(output,
    volts)`` ramps at a fixed rate, ``read_voltage(output)`` reads back to 1 mV, an interlock
    input (a door switch, the cryostat's watchdog) forbids any change while it is open.
:class:`Sequencer`
    The experiment's timing sequencer. Registers (``write_register``/``read_register``) hold
    its settings, among them the frequency of the acousto-optic modulator of the
    velocity-selection laser (``AOM_VSEL``, MHz); ``run(shots, ...)`` runs a block of samples
    and returns the detector histogram (``upper``, ``lower``, ``reference`` for the atomic
    levels e, g, i). Its counts come from a toy fringe model, not from the physics of the
    simulated rig: enough for a calibration to find a best setting, nothing more.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["InstrumentError", "SupplyRangeError", "SupplyInterlockOpen", "SequencerBusy",
           "ElectrodeSupply", "Sequencer"]


class InstrumentError(Exception):
    """Base of the errors the made-up instruments raise."""


class SupplyRangeError(InstrumentError):
    """A voltage outside the supply's own output range."""


class SupplyInterlockOpen(InstrumentError):
    """The supply's interlock input is open: its outputs cannot change."""


class SequencerBusy(InstrumentError):
    """The sequencer is running a block started by someone else."""


class _Clock:
    """The instruments' shared virtual clock, s (a real rig reads its own timebase)."""

    def __init__(self) -> None:
        self.now_s = 0.0


class ElectrodeSupply:
    """A made-up two-output electrode supply (see the module docstring).

    Parameters
    ----------
    address : str
        Its network address (only checked for shape: nothing is contacted).
    clock : _Clock, optional
        Shared virtual clock.
    range_v : tuple of float
        Output range of the supply, V.
    ramp_v_per_s : float
        Ramp rate of an output, V/s.
    """

    OUTPUTS = ("HV1", "HV2")
    RESOLUTION_V = 1e-3

    def __init__(self, address: str, *, clock: _Clock | None = None,
                 range_v: tuple[float, float] = (-10.0, 10.0), ramp_v_per_s: float = 2.0) -> None:
        if not address.startswith("supply://"):
            raise ValueError(f"address: expected 'supply://HOST', got {address!r}")
        self.address = address
        self.clock = clock or _Clock()
        self.range_v = range_v
        self.ramp_v_per_s = ramp_v_per_s
        self._volts = dict.fromkeys(self.OUTPUTS, 3.0)
        self._interlock: str | None = None
        self.connected = True

    def set_voltage(self, output: str, volts: float) -> None:
        """Ramp an output to ``volts`` (blocks for the ramp, on the virtual clock)."""
        if output not in self._volts:
            raise SupplyRangeError(f"no output {output!r} (outputs {self.OUTPUTS})")
        if self._interlock is not None:
            raise SupplyInterlockOpen(self._interlock)
        low, high = self.range_v
        if not low <= volts <= high:
            raise SupplyRangeError(f"{output}: {volts} V outside the supply's range [{low}, {high}] V")
        self.clock.now_s += abs(volts - self._volts[output]) / self.ramp_v_per_s
        self._volts[output] = float(volts)

    def read_voltage(self, output: str) -> float:
        """The output's measured voltage, quantised to 1 mV."""
        return round(self._volts[output] / self.RESOLUTION_V) * self.RESOLUTION_V

    def interlock(self) -> str | None:
        """The reason the interlock input is open, or None while it is closed."""
        return self._interlock

    def open_interlock(self, reason: str) -> None:
        """Open the interlock input (what a door switch or a watchdog does)."""
        self._interlock = reason

    def close_interlock(self) -> None:
        """Close the interlock input again."""
        self._interlock = None

    def disconnect(self) -> None:
        """Close the connection."""
        self.connected = False


class Sequencer:
    """A made-up timing sequencer with a toy detector model (see the module docstring).

    Parameters
    ----------
    address : str
        Its network address (only checked for shape).
    supply : ElectrodeSupply
        The electrode supply (its HV1 output tunes the atoms, in the toy model).
    repetition_rate_hz : float
        Samples per second.
    seed : int
        Seed of the toy model's counting noise.
    """

    def __init__(self, address: str, *, supply: ElectrodeSupply, repetition_rate_hz: float = 150.0,
                 seed: int = 0) -> None:
        if not address.startswith("seq://"):
            raise ValueError(f"address: expected 'seq://HOST', got {address!r}")
        self.address = address
        self.supply = supply
        self.clock = supply.clock
        self.repetition_rate_hz = repetition_rate_hz
        self._registers: dict[str, float] = {"AOM_VSEL": 111.0}
        self._rng = np.random.default_rng(seed)
        self._shots_done = 0
        self.busy_with: str | None = None

    def write_register(self, name: str, value: float) -> None:
        """Set a register (the AOM frequency takes 0.2 s to settle)."""
        if self.busy_with is not None:
            raise SequencerBusy(self.busy_with)
        self._registers[name] = float(value)
        self.clock.now_s += 0.2

    def read_register(self, name: str) -> float:
        """A register's value."""
        return self._registers[name]

    def shots_done(self) -> int:
        """Samples run since power-up."""
        return self._shots_done

    def time_s(self) -> float:
        """The sequencer's timebase, s."""
        return self.clock.now_s

    def run(self, shots: int, *, photon: bool, ramsey_phase_deg: float) -> dict[str, int]:
        """Run ``shots`` samples; the detector histogram (upper, lower, reference)."""
        if self.busy_with is not None:
            raise SequencerBusy(self.busy_with)
        self.clock.now_s += shots / self.repetition_rate_hz
        self._shots_done += shots
        # Toy model: an inverted fringe whose depth peaks at one AOM frequency and one voltage.
        aom = self._registers["AOM_VSEL"]
        volts = self.supply.read_voltage("HV1")
        depth = 0.7 * math.exp(-((aom - 113.0) / 12.0) ** 2 - ((volts - 3.02) / 0.05) ** 2)
        phase = math.radians(ramsey_phase_deg)
        lower = 0.5 - 0.4 * math.cos(phase) + (depth * math.cos(phase) if photon else 0.0)
        lower = min(max(lower, 0.0), 0.97)
        probabilities = np.array([0.03, lower, 0.97 - lower])
        counts = self._rng.poisson(shots * 0.11 * probabilities)
        return {"upper": int(counts[0]), "lower": int(counts[1]), "reference": int(counts[2])}

    def disconnect(self) -> None:
        """Close the connection."""
