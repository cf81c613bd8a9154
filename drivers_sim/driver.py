"""The simulated rig as a rig driver (:mod:`autotune.driver`), served like any lab's driver.

:class:`SimulatedDriver` speaks in channels, as a control system does:

==================  =====  =====================================================================
channel             unit   meaning
==================  =====  =====================================================================
``velocity``        m/s    the selected velocity class (the simulated rig's own set-point)
``detuning``        Hz     the detuning set-point (the simulated rig's own set-point)
``stark_voltage``   V      the Stark-tuning electrode voltage: the detuning set-point through the
                           rig's nominal Stark law ``k (E^2 - E_bias^2)``, ``E = V / gap``
==================  =====  =====================================================================

``autotune rig`` maps ``velocity`` and ``detuning`` to the channels of the same names
unchanged, so the simulated rig answers as it always did; a DRIVER.toml may instead map
``detuning`` to ``stark_voltage`` through the Stark law (``configs/sim-driver.toml``), as a
lab maps it to its electrode supply. The limits, largest steps and safe values of
``velocity`` and ``detuning`` come from the rig's configuration; ``stark_voltage`` is
described by its unit only (the rig still refuses a voltage whose detuning breaks its limits).
Either sign of the voltage gives the same field squared; the read-back keeps the sign last
commanded, as an electrode supply reports the voltage it outputs.

The simulated-only operations ``truth``, ``advance`` and ``thermal_step`` pass through in the
protocol's own units (set-points as the simulated rig defines them).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from autotune.driver import BadRequest
from drivers_sim.config import SimConfigError, load_sim_config
from drivers_sim.rig import SimulatedRig

__all__ = ["SimulatedDriver"]


class SimulatedDriver:
    """A :class:`SimulatedRig` behind the rig-driver interface.

    Parameters
    ----------
    rig : SimulatedRig
        The simulated rig to drive.
    """

    def __init__(self, rig: SimulatedRig) -> None:
        if not isinstance(rig, SimulatedRig):
            raise TypeError(f"rig: expected a SimulatedRig, got {type(rig).__name__}")
        self._rig = rig
        stark = rig.config.stark
        self._k = stark.coefficient_hz_m2_per_v2
        self._bias = stark.bias_field_v_per_m
        self._gap = stark.electrode_gap_m
        self._voltage_sign = 1.0

    @classmethod
    def from_file(cls, config: str | Path, seed: int | None = None) -> SimulatedDriver:
        """Build the rig of a simulated-rig TOML file (default seed: its ``rig.default_seed``)."""
        return cls(SimulatedRig(load_sim_config(config), seed))

    @classmethod
    def from_config(cls, options: Mapping[str, Any], config_dir: Path) -> SimulatedDriver:
        """Build from a DRIVER.toml's ``[driver.options]``: ``config`` (a simulated-rig TOML,
        relative to the DRIVER.toml's folder) and optional ``seed``.

        Raises
        ------
        TypeError
            For an unknown option, a missing ``config``, a seed out of range, or a ``config``
            file that cannot be read or holds a wrong value (the refusal of the options,
            naming the file: ``autotune serve`` exits 2).
        """
        unknown = sorted(set(options) - {"config", "seed"})
        if unknown:
            raise TypeError(f"unknown option {unknown[0]!r} (expected config, seed)")
        if "config" not in options or not isinstance(options["config"], str):
            raise TypeError(f"config: expected the path of a simulated-rig TOML, got {options.get('config')!r}")
        seed = options.get("seed")
        if seed is not None and (isinstance(seed, bool) or not isinstance(seed, int)
                                 or not 0 <= seed <= 2**63 - 1):
            raise TypeError(f"seed: expected an integer from 0 to 2**63 - 1, got {seed!r}")
        try:
            config = load_sim_config(Path(config_dir) / options["config"])
        except SimConfigError as exc:
            raise TypeError(str(exc)) from exc
        return cls(SimulatedRig(config, seed))

    @property
    def sim(self) -> SimulatedRig:
        """The simulated rig (for its truth, clock and interlock in tests and studies)."""
        return self._rig

    # ------------------------------------------------------------------ the Stark channel

    def _detuning_for_voltage(self, volts: float) -> float:
        field = volts / self._gap
        return self._k * (field * field - self._bias**2)

    def _voltage_for_detuning(self, detuning_hz: float) -> float:
        square = self._bias**2 + detuning_hz / self._k
        return self._voltage_sign * math.sqrt(max(square, 0.0)) * self._gap

    # ------------------------------------------------------------------ the interface

    def describe(self) -> dict[str, Any]:
        """Name, rate, shot limit and channels (limits of velocity and detuning from the rig)."""
        rig = self._rig.describe()
        channels: dict[str, Any] = {}
        for name, limit in rig["setpoints"].items():
            channels[name] = {**limit, "safe": rig["safe_setpoints"][name]}
        channels["stark_voltage"] = {"unit": "V"}
        return {"rig": rig["rig"], "simulated": True, "repetition_rate_hz": rig["repetition_rate_hz"],
                "max_shots_per_acquisition": rig["max_shots_per_acquisition"], "channels": channels}

    def _setpoints_for(self, channels: Mapping[str, float]) -> tuple[dict[str, float], float | None]:
        if "stark_voltage" in channels and "detuning" in channels:
            raise BadRequest("channels: expected detuning or stark_voltage, not both (one sets the other)")
        setpoints: dict[str, float] = {}
        sign = None
        for channel, value in channels.items():
            if channel == "stark_voltage":
                setpoints["detuning"] = self._detuning_for_voltage(float(value))
                sign = -1.0 if value < 0 else 1.0
            else:
                setpoints[channel] = float(value)
        return setpoints, sign

    def apply(self, channels: Mapping[str, float]) -> None:
        """Apply channel values (the rig checks its own limits and steps again)."""
        setpoints, sign = self._setpoints_for(channels)
        self._rig.apply(setpoints)
        if sign is not None:
            self._voltage_sign = sign

    def acquire(self, field: str, ramsey_phase: float, shots: int) -> dict[str, Any]:
        """Acquire; counts with the rig-clock start and end."""
        result = self._rig.acquire(field, ramsey_phase, shots)
        return {"counts": result["counts"], "t_start": result["t_start"], "t_end": result["t_end"]}

    def status(self) -> dict[str, Any]:
        """Clock, busy, interlock, shot total and the read-back of every channel."""
        status = self._rig.status()
        channels = dict(status["setpoints"])
        channels["stark_voltage"] = self._voltage_for_detuning(channels["detuning"])
        return {"clock": status["clock"], "busy": status["busy"], "interlock": status["interlock"],
                "channels": channels, "shots_total": status["shots_total"]}

    def safe(self, channels: Mapping[str, float]) -> None:
        """Go to the given safe channel values without step limit, also under interlock."""
        setpoints, sign = self._setpoints_for(channels)
        self._rig.safe(setpoints)
        if sign is not None:
            self._voltage_sign = sign

    def truth(self, setpoints: Mapping[str, float] | None = None) -> dict[str, Any]:
        """The rig's noiseless truth (protocol units)."""
        return self._rig.truth(setpoints)

    def advance(self, seconds: float) -> dict[str, Any]:
        """Move the virtual clock on, s."""
        return self._rig.advance(seconds)

    def thermal_step(self, shift_hz: float) -> dict[str, Any]:
        """A sudden cavity frequency step, Hz."""
        return self._rig.thermal_step(shift_hz)
