"""The channel map: from autotune's set-points to a control system's channels and back.

No control system names its channels ``velocity`` and ``detuning`` in SI units. Each set-point
of the wire protocol is mapped to one channel of the lab's own naming and unit through a
declared law, with its inverse for read-backs:

``linear``
    ``setpoint = scale * channel + offset`` (``scale`` in set-point unit per channel unit,
    ``offset`` in the set-point unit), e.g. the velocity selected by a Doppler-selective laser
    whose acousto-optic frequency is the channel.
``stark``
    The quadratic Stark tuning of the atomic line by an electrode voltage (docs/physics.md section 4):
    ``detuning = k (E^2 - E_bias^2)`` with ``E = V / gap``; ``k`` in Hz per (V/m)^2, ``E_bias``
    the field at detuning 0 in V/m, the gap in m, the channel in V, mV or kV. The law is even
    in ``E``, so its inverse needs a **branch**, the sign of the voltage, chosen explicitly;
    the channel range must lie on that branch.

Limits and steps may be given in either unit, or come from the driver's own channel
description; all of them hold at once. The set-point limits a rig describes are the
intersection of the declared set-point limits and the image of the channel limits, so that
every described set-point maps to an allowed channel value. The described ``max_step`` is the
declared one, or tighter: the channel step limit times the smallest slope of the law over the
channel range, so that no described step can move the channel further than its own limit.
The server checks both units again at every ``apply``.

Everything here is pure: no I/O, no sockets.
"""

from __future__ import annotations

import dataclasses
import math
import types
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Annotated, Any, ClassVar, Literal

from autotune import plausible
from autotune.errors import (
    ConfigError,
    ConfigErrors,
    FileErrors,
    OutOfRange,
    ValueRefused,
)
from autotune.wire.protocol import STEP_TOLERANCE
from autotune.schema import Expect, check, number, refuse, table, text

__all__ = [
    "SETPOINT_UNITS",
    "LinearLaw",
    "StarkLaw",
    "ChannelInfo",
    "MappedSetpoint",
    "InForce",
    "ChannelMap",
    "channel_map_from_table",
    "identity_channel_map",
]

#: Set-point names of protocol version 1 and their units.
SETPOINT_UNITS: Mapping[str, str] = types.MappingProxyType({"velocity": "m/s", "detuning": "Hz"})

#: Units a Stark-law channel may be given in, and their value in volts.
_VOLT_UNITS: Mapping[str, float] = types.MappingProxyType({"V": 1.0, "mV": 1e-3, "kV": 1e3})

# Relative slack for comparisons of values that went through a law and its inverse.
_ROUNDING = 1e-9

_INF = math.inf


def _fmt(value: float) -> str:
    return f"{value:.10g}"


# --------------------------------------------------------------------------- laws


@dataclass(frozen=True)
class LinearLaw:
    """``setpoint = scale * channel + offset``.

    Attributes
    ----------
    scale : float
        Set-point unit per channel unit, finite and non-zero (negative: decreasing).
    offset : float
        Set-point at channel 0, in the set-point unit.
    """

    scale: float
    offset: float = 0.0
    kind: ClassVar[str] = "linear"

    def __post_init__(self) -> None:
        if not (math.isfinite(self.scale) and self.scale != 0.0):
            raise ValueRefused(f"scale: expected a finite non-zero number, got {self.scale!r}")
        if not math.isfinite(self.offset):
            raise ValueRefused(f"offset: expected a finite number, got {self.offset!r}")

    def to_setpoint(self, channel: float) -> float:
        """The set-point a channel value gives."""
        return self.scale * channel + self.offset

    def to_channel(self, setpoint: float) -> float:
        """The channel value that gives a set-point (the inverse)."""
        return (setpoint - self.offset) / self.scale

    def branch_interval(self) -> tuple[float, float]:
        """Channel values the law is defined on: all."""
        return -_INF, _INF

    def reach(self) -> tuple[float, float]:
        """Set-points the law can give: all."""
        return -_INF, _INF

    def smallest_slope(self, low: float, high: float) -> float:
        """Smallest ``|d setpoint / d channel|`` over a channel interval."""
        return abs(self.scale)

    def describe(self) -> str:
        """The law in words, for messages and logs."""
        return f"setpoint = {self.scale!r} * channel + {self.offset!r}"


@dataclass(frozen=True)
class StarkLaw:
    """``detuning = k (E^2 - E_bias^2)``, ``E = V / gap``, on one branch (sign of ``V``).

    Attributes
    ----------
    coefficient_hz_m2_per_v2 : float
        ``k``, Hz per (V/m)^2, non-zero (about -25 for an e-g pair near n = 50, i.e. -250 kHz
        per (V/cm)^2; docs/physics.md section 4).
    bias_field_v_per_m : float
        ``E_bias``, the field at detuning 0, V/m (>= 0).
    electrode_gap_m : float
        Electrode gap, m (> 0).
    branch : {"positive", "negative"}
        Sign of the electrode voltage the inverse returns.
    volts_per_unit : float
        Volts per channel unit (1 for V, 1e-3 for mV, 1e3 for kV).
    """

    coefficient_hz_m2_per_v2: float
    bias_field_v_per_m: float
    electrode_gap_m: float
    branch: Literal["positive", "negative"] = "positive"
    volts_per_unit: float = 1.0
    kind: ClassVar[str] = "stark"

    def __post_init__(self) -> None:
        k = self.coefficient_hz_m2_per_v2
        if not (math.isfinite(k) and k != 0.0):
            raise ValueRefused(f"coefficient_hz_m2_per_v2: expected a finite non-zero number, got {k!r}")
        if not (math.isfinite(self.bias_field_v_per_m) and self.bias_field_v_per_m >= 0.0):
            raise ValueRefused(f"bias_field_v_per_m: expected a finite number >= 0, got {self.bias_field_v_per_m!r}")
        if not (math.isfinite(self.electrode_gap_m) and self.electrode_gap_m > 0.0):
            raise ValueRefused(f"electrode_gap_m: expected a finite number > 0, got {self.electrode_gap_m!r}")
        if self.branch not in ("positive", "negative"):
            raise ValueRefused(f"branch: expected 'positive' or 'negative', got {self.branch!r}")
        if not (math.isfinite(self.volts_per_unit) and self.volts_per_unit > 0.0):
            raise ValueRefused(f"volts_per_unit: expected a finite number > 0, got {self.volts_per_unit!r}")

    @property
    def _sign(self) -> float:
        return 1.0 if self.branch == "positive" else -1.0

    def to_setpoint(self, channel: float) -> float:
        """The detuning (Hz) an electrode channel value gives (either sign of the voltage)."""
        field = channel * self.volts_per_unit / self.electrode_gap_m
        # + 0.0 turns the -0.0 of the bias field itself into 0.0.
        return self.coefficient_hz_m2_per_v2 * (field * field - self.bias_field_v_per_m**2) + 0.0

    def to_channel(self, setpoint: float) -> float:
        """The channel value on the chosen branch that gives a detuning (Hz).

        Raises
        ------
        ValueRefused
            If the detuning needs ``E^2 < 0`` (beyond what the law reaches at ``E = 0``).
        """
        square = self.bias_field_v_per_m**2 + setpoint / self.coefficient_hz_m2_per_v2
        if square < 0.0:
            raise ValueRefused(f"detuning {_fmt(setpoint)} Hz is beyond the Stark law's reach "
                             f"({_fmt(self.reach_limit)} Hz at zero field)")
        return self._sign * math.sqrt(square) * self.electrode_gap_m / self.volts_per_unit

    @property
    def reach_limit(self) -> float:
        """The detuning at zero field, ``-k E_bias^2`` (Hz): the law's extreme."""
        return -self.coefficient_hz_m2_per_v2 * self.bias_field_v_per_m**2

    def branch_interval(self) -> tuple[float, float]:
        """Channel values of the chosen branch."""
        return (0.0, _INF) if self.branch == "positive" else (-_INF, 0.0)

    def reach(self) -> tuple[float, float]:
        """Detunings the law can give (Hz)."""
        if self.coefficient_hz_m2_per_v2 < 0.0:
            return -_INF, self.reach_limit
        return self.reach_limit, _INF

    def smallest_slope(self, low: float, high: float) -> float:
        """Smallest ``|d detuning / d channel|`` (Hz per channel unit) over a channel interval
        on the branch: ``2 |k| |V| / gap^2`` at the end nearest zero volts."""
        nearest = min(abs(low), abs(high))
        volts_per_unit = self.volts_per_unit
        return (2.0 * abs(self.coefficient_hz_m2_per_v2) * nearest * volts_per_unit**2
                / self.electrode_gap_m**2)

    def describe(self) -> str:
        """The law in words, for messages and logs."""
        return (f"detuning = {self.coefficient_hz_m2_per_v2!r} * ((V / {self.electrode_gap_m!r})^2 - "
                f"{self.bias_field_v_per_m!r}^2), {self.branch} branch")


Law = LinearLaw | StarkLaw


def _image(law: Law, low: float, high: float) -> tuple[float, float]:
    """The set-point interval a channel interval on the law's branch maps onto."""
    ends = sorted((law.to_setpoint(low), law.to_setpoint(high)))
    return ends[0], ends[1]


def _preimage(law: Law, low: float, high: float) -> tuple[float, float]:
    """The channel interval (on the branch) a reachable set-point interval comes from."""
    ends = sorted((law.to_channel(low), law.to_channel(high)))
    return ends[0], ends[1]


# --------------------------------------------------------------------------- declarations


@dataclass(frozen=True)
class ChannelInfo:
    """What a driver says about one of its channels (unit; limits and safe value optional).

    Attributes
    ----------
    unit : str
        The channel's unit.
    min, max, max_step, safe : float or None
        Its limits, largest step and safe value in that unit, where the driver gives them.
    """

    unit: str
    min: float | None = None
    max: float | None = None
    max_step: float | None = None
    safe: float | None = None


@dataclass(frozen=True)
class MappedSetpoint:
    """One set-point mapped to one channel, with its effective limits in both units.

    Attributes
    ----------
    name, unit : str
        The protocol's set-point name and unit.
    channel, channel_unit : str
        The control system's channel name and unit.
    law : LinearLaw or StarkLaw
        ``setpoint = law.to_setpoint(channel)``.
    min, max, max_step : float
        Effective set-point limits and largest step (what ``describe`` reports).
    channel_min, channel_max : float
        Effective channel limits (the image of ``[min, max]``).
    channel_max_step : float or None
        Largest channel step, where one is declared.
    safe, channel_safe : float
        The safe value in both units.
    channel_readback_tolerance : float
        Largest difference of a read-back from the commanded channel value that still counts
        as the commanded set-point being in force, channel unit.
    """

    name: str
    unit: str
    channel: str
    channel_unit: str
    law: Law
    min: float
    max: float
    max_step: float
    channel_min: float
    channel_max: float
    channel_max_step: float | None
    safe: float
    channel_safe: float
    channel_readback_tolerance: float = 0.0

    def channel_for(self, value: float) -> float:
        """The channel value for a set-point within the limits, checked in the channel unit.

        Raises
        ------
        OutOfRange
            If the set-point is outside ``[min, max]`` or its channel value outside the
            channel limits.
        """
        if not self.min <= value <= self.max:
            raise OutOfRange(f"{self.name}: expected a value within [min {_fmt(self.min)}, "
                             f"max {_fmt(self.max)}] {self.unit}, got {_fmt(value)}")
        try:
            channel = self.law.to_channel(value)
        except ValueRefused as exc:
            raise OutOfRange(f"{self.name}: {exc}") from None
        slack = _ROUNDING * max(abs(self.channel_min), abs(self.channel_max), 1e-300)
        if not self.channel_min - slack <= channel <= self.channel_max + slack:
            raise OutOfRange(
                f"{self.name}: {_fmt(value)} {self.unit} needs channel {self.channel} at "
                f"{_fmt(channel)} {self.channel_unit}, outside its limits [min "
                f"{_fmt(self.channel_min)}, max {_fmt(self.channel_max)}] {self.channel_unit}")
        # Within rounding of an edge: send the edge itself, never a hair beyond it.
        return min(max(channel, self.channel_min), self.channel_max)

    def readback_matches(self, readback: float, commanded_channel: float) -> bool:
        """True if a read-back is the commanded channel value within the tolerance."""
        span = max(abs(self.channel_min), abs(self.channel_max))
        return abs(readback - commanded_channel) <= self.channel_readback_tolerance + _ROUNDING * span

    def as_dict(self) -> dict[str, Any]:
        """A JSON-ready summary (for the start-up log)."""
        return {"channel": self.channel, "channel_unit": self.channel_unit, "law": self.law.describe(),
                "unit": self.unit, "min": self.min, "max": self.max, "max_step": self.max_step,
                "channel_min": self.channel_min, "channel_max": self.channel_max,
                "channel_max_step": self.channel_max_step, "safe": self.safe,
                "channel_safe": self.channel_safe}


@dataclass(frozen=True)
class InForce:
    """A set-point in force, as the server reports it.

    Attributes
    ----------
    setpoint : float
        In the set-point's unit: the commanded value while the read-back agrees with it,
        else the read-back through the law.
    channel : float
        The channel value it corresponds to (commanded or read back).
    as_commanded : bool
        True if the read-back agreed with the commanded value.
    """

    setpoint: float
    channel: float
    as_commanded: bool


class ChannelMap:
    """The set-points of a rig, each mapped to one channel (see the module docstring).

    Parameters
    ----------
    setpoints : Mapping[str, MappedSetpoint]
        One entry per set-point name, with distinct channels.
    """

    def __init__(self, setpoints: Mapping[str, MappedSetpoint]) -> None:
        if not setpoints:
            raise ValueRefused("a channel map needs at least one set-point")
        channels = [m.channel for m in setpoints.values()]
        if len(set(channels)) != len(channels):
            raise ValueRefused(f"two set-points map to one channel: {channels}")
        self._setpoints = types.MappingProxyType(dict(setpoints))

    @property
    def setpoints(self) -> Mapping[str, MappedSetpoint]:
        """The mapped set-points by name."""
        return self._setpoints

    def __getitem__(self, name: str) -> MappedSetpoint:
        return self._setpoints[name]

    def __iter__(self):  # type: ignore[no-untyped-def]
        return iter(self._setpoints)

    def describe_setpoints(self) -> dict[str, dict[str, Any]]:
        """The ``setpoints`` object of a ``describe`` result."""
        return {name: {"unit": m.unit, "min": m.min, "max": m.max, "max_step": m.max_step}
                for name, m in self._setpoints.items()}

    def safe_setpoints(self) -> dict[str, float]:
        """Safe value of every set-point, set-point units."""
        return {name: m.safe for name, m in self._setpoints.items()}

    def safe_channels(self) -> dict[str, float]:
        """Safe value of every mapped channel, channel units."""
        return {m.channel: m.channel_safe for m in self._setpoints.values()}

    def in_force(self, readbacks: Mapping[str, float],
                 commanded: Mapping[str, tuple[float, float]]) -> dict[str, InForce]:
        """The set-points in force from channel read-backs.

        Parameters
        ----------
        readbacks : Mapping[str, float]
            Channel name to read-back value (must hold every mapped channel).
        commanded : Mapping[str, tuple[float, float]]
            Set-point name to the last commanded (set-point, channel value), if any.

        Returns
        -------
        dict
            Set-point name to :class:`InForce`.

        Raises
        ------
        KeyError
            If a mapped channel has no read-back.
        """
        result = {}
        for name, m in self._setpoints.items():
            readback = float(readbacks[m.channel])
            last = commanded.get(name)
            if last is not None and m.readback_matches(readback, last[1]):
                result[name] = InForce(last[0], last[1], True)
            else:
                result[name] = InForce(m.law.to_setpoint(readback), readback, False)
        return result

    def plan_apply(self, wanted: Mapping[str, float], in_force: Mapping[str, InForce]) -> dict[str, float]:
        """Check a request in both units and return the channel values to send.

        Parameters
        ----------
        wanted : Mapping[str, float]
            Requested set-points (finite numbers; partial allowed).
        in_force : Mapping[str, InForce]
            The set-points in force (from :meth:`in_force`).

        Returns
        -------
        dict
            Channel name to value, for the requested set-points only.

        Raises
        ------
        OutOfRange
            For an unknown name, a value outside the limits of either unit, or a step larger
            than ``max_step`` (set-point unit) or ``channel_max_step`` (channel unit). The
            detail names the set-point, the limit and the value.
        """
        channels: dict[str, float] = {}
        for name, value in wanted.items():
            m = self._setpoints.get(name)
            if m is None:
                raise OutOfRange(f"{name}: expected a set-point name among {sorted(self._setpoints)}, "
                                 f"got {name!r}")
            channel = m.channel_for(value)
            current = in_force[name]
            step = value - current.setpoint
            if abs(step) > m.max_step * (1.0 + STEP_TOLERANCE):
                raise OutOfRange(f"{name}: expected a step of at most max_step {_fmt(m.max_step)} {m.unit} "
                                 f"from {_fmt(current.setpoint)}, got {_fmt(value)} (step {step:+.10g})")
            if m.channel_max_step is not None:
                channel_step = channel - current.channel
                if abs(channel_step) > m.channel_max_step * (1.0 + STEP_TOLERANCE):
                    raise OutOfRange(
                        f"{name}: expected a step of channel {m.channel} of at most channel_max_step "
                        f"{_fmt(m.channel_max_step)} {m.channel_unit} from {_fmt(current.channel)}, got "
                        f"{_fmt(channel)} (step {channel_step:+.10g}) for {_fmt(value)} {m.unit}")
            channels[m.channel] = channel
        return channels

    def summary(self) -> dict[str, dict[str, Any]]:
        """JSON-ready summary of every mapped set-point."""
        return {name: m.as_dict() for name, m in self._setpoints.items()}


# --------------------------------------------------------------------------- building a map

_NUMBER = number()
_SIZE = number(0.0, low_open=True)


@table(kw_only=True)
class _Declaration:
    """The keys of every ``[setpoints.NAME]`` table (the law's own are its subclass's)."""

    unit: text()
    channel: text()
    channel_unit: text()
    limit_min: _NUMBER | None = None
    limit_max: _NUMBER | None = None
    max_step: _SIZE | None = None
    channel_limit_min: _NUMBER | None = None
    channel_limit_max: _NUMBER | None = None
    channel_max_step: _SIZE | None = None
    safe: _NUMBER | None = None
    channel_safe: _NUMBER | None = None
    channel_readback_tolerance: number(0.0) = 0.0

    def __post_init__(self) -> None:
        for low_key, high_key in (("limit_min", "limit_max"),
                                  ("channel_limit_min", "channel_limit_max")):
            low, high = getattr(self, low_key), getattr(self, high_key)
            if low is not None and high is not None and low > high:
                refuse(high_key, f"a number >= {low_key} {_fmt(low)}", high)
        if self.safe is not None and self.channel_safe is not None:
            refuse("safe", "safe or channel_safe, not both", f"{self.safe} and {self.channel_safe}")


@table(kw_only=True)
class _Linear(_Declaration):
    law: Literal["linear"]
    scale: number(expected="a non-zero number (set-point unit per channel unit)")
    offset: _NUMBER = 0.0

    def __post_init__(self) -> None:
        super().__post_init__()
        if self.scale == 0.0:
            refuse("scale", f"a non-zero number ({self.unit} per {self.channel_unit})", 0.0)

    def law_of(self) -> Law:
        return LinearLaw(self.scale, self.offset)


@table(kw_only=True)
class _Stark(_Declaration):
    law: Literal["stark"]
    coefficient_hz_m2_per_v2: number(expected="a non-zero number, Hz per (V/m)^2")
    bias_field_v_per_m: number(0.0)
    electrode_gap_m: _SIZE
    branch: Annotated[Literal["positive", "negative"],
                      Expect("'positive' or 'negative' (the sign of the electrode voltage)")]

    def __post_init__(self) -> None:
        super().__post_init__()
        if self.coefficient_hz_m2_per_v2 == 0.0:
            refuse("coefficient_hz_m2_per_v2", "a non-zero number, Hz per (V/m)^2", 0.0)
        if self.channel_unit not in _VOLT_UNITS:
            refuse("channel_unit", f"a voltage unit for the stark law: {', '.join(_VOLT_UNITS)}",
                   self.channel_unit)

    def law_of(self) -> Law:
        return StarkLaw(self.coefficient_hz_m2_per_v2, self.bias_field_v_per_m,
                        self.electrode_gap_m, self.branch, _VOLT_UNITS[self.channel_unit])


_LAWS: Mapping[str, type[_Linear] | type[_Stark]] = {"linear": _Linear, "stark": _Stark}


#: The ranges a lab could mean of a set-point's value and step (autotune.plausible).
_SETPOINT_RANGES: Mapping[str, tuple[plausible.Plausible, plausible.Plausible]] = {
    "velocity": (plausible.VELOCITY_M_PER_S, plausible.VELOCITY_STEP_M_PER_S),
    "detuning": (plausible.DETUNING_HZ, plausible.DETUNING_STEP_HZ),
}


def _channel_range(channel_unit: str) -> plausible.Plausible:
    """What a channel value in ``channel_unit`` may be: voltages up to 100 kV, anything else
    within the catch-all (no stand-in for "no limit": leave the key out)."""
    if channel_unit in _VOLT_UNITS:
        bound = plausible.VOLTAGE_V.high / _VOLT_UNITS[channel_unit]
        return dataclasses.replace(plausible.VOLTAGE_V, low=-bound, high=bound, unit=channel_unit)
    return plausible.CHANNEL_VALUE


def _key_ranges(name: str, channel_unit: str) -> dict[str, plausible.Plausible]:
    """The range a lab could mean of every numeric key of a ``[setpoints.NAME]`` table."""
    value, step = _SETPOINT_RANGES[name]
    channel = _channel_range(channel_unit)
    channel_size = dataclasses.replace(channel, low=0.0, high=channel.high)
    return {
        "limit_min": value, "limit_max": value, "safe": value, "max_step": step,
        "offset": dataclasses.replace(value, low=-max(abs(value.low), value.high),
                                      high=max(abs(value.low), value.high)),
        "channel_limit_min": channel, "channel_limit_max": channel, "channel_safe": channel,
        "channel_max_step": channel_size, "channel_readback_tolerance": channel_size,
        "scale": plausible.LAW_SCALE,
        "coefficient_hz_m2_per_v2": plausible.STARK_COEFFICIENT_HZ_M2_PER_V2,
        "bias_field_v_per_m": plausible.ELECTRIC_FIELD_V_PER_M,
        "electrode_gap_m": plausible.ELECTRODE_GAP_M,
    }


def _implausible(table: Mapping[str, Any], file: str, prefix: str, name: str
                 ) -> list[ConfigError]:
    """Every numeric key of one set-point's table outside the range a lab could mean (a value
    typed in another unit gets a hint at it); wrong types are left to the schema."""
    channel_unit = table.get("channel_unit")
    ranges = _key_ranges(name, channel_unit if isinstance(channel_unit, str) else "")
    problems = []
    for key, spec in ranges.items():
        value = table.get(key)
        if isinstance(value, bool) or not isinstance(value, int | float) or \
                not math.isfinite(value):
            continue
        found = spec.problem(float(value))
        if found is not None:
            problems.append(ConfigError(file, f"{prefix}.{key}", found[0], value, hint=found[1]))
    return problems


def _at(file: str, where: str) -> Callable[[str, str, object], ConfigError]:
    """``fail(key, expected, got)``: a problem of ``key`` (or of the whole table: "") at ``where``."""
    return lambda key, expected, got: ConfigError(file, f"{where}.{key}" if key else where,
                                                  expected, got)


def _tightest(values: list[float | None], pick: Any, default: float) -> float:
    present = [v for v in values if v is not None]
    return pick(present) if present else default


def _resolve(name: str, declared: _Linear | _Stark, law: Law, driver: ChannelInfo,
             fail: Callable[[str, str, object], ConfigError]) -> MappedSetpoint:
    """Combine declared limits (both units) with the driver's into effective ones; the first
    rule that does not hold raises ``fail(key, expected, got)``."""
    unit, channel, channel_unit = declared.unit, declared.channel, declared.channel_unit
    branch_low, branch_high = law.branch_interval()
    channel_low = _tightest([declared.channel_limit_min, driver.min, branch_low], max, -_INF)
    channel_high = _tightest([declared.channel_limit_max, driver.max, branch_high], min, _INF)
    if channel_low > channel_high:
        raise fail("channel_limit_min",
                   f"channel limits overlapping the driver's [{driver.min}, {driver.max}] "
                   f"{channel_unit} and the law's branch [{branch_low}, {branch_high}]",
                   f"[{declared.channel_limit_min}, {declared.channel_limit_max}]")
    image_low, image_high = _image(law, channel_low, channel_high)
    low = max(image_low, _tightest([declared.limit_min], max, -_INF))
    high = min(image_high, _tightest([declared.limit_max], min, _INF))
    reach_low, reach_high = law.reach()
    low, high = max(low, reach_low), min(high, reach_high)
    if not (math.isfinite(low) and math.isfinite(high)):
        raise fail("", "finite limits: limit_min and limit_max, or channel_limit_min and "
                       "channel_limit_max, here or in the driver's channel description",
                   f"[{low}, {high}] {unit}")
    if low > high:
        raise fail("limit_min", f"set-point limits overlapping the channel limits "
                                f"[{_fmt(channel_low)}, {_fmt(channel_high)}] {channel_unit}, "
                                f"which give [{_fmt(image_low)}, {_fmt(image_high)}] {unit}",
                   f"[{declared.limit_min}, {declared.limit_max}]")
    preimage_low, preimage_high = _preimage(law, low, high)
    channel_low, channel_high = max(channel_low, preimage_low), min(channel_high, preimage_high)
    if channel_low > channel_high:  # a single point, split by rounding
        channel_low = channel_high = 0.5 * (channel_low + channel_high)

    declared_step = declared.max_step
    channel_step = _tightest([declared.channel_max_step, driver.max_step], min, _INF)
    if declared_step is None and not math.isfinite(channel_step):
        raise fail("max_step", "a largest step: max_step or channel_max_step here, or max_step "
                               "in the driver's channel description", "none")
    max_step = declared_step if declared_step is not None else _INF
    if math.isfinite(channel_step):
        max_step = min(max_step, channel_step * law.smallest_slope(channel_low, channel_high))
    if not max_step > 0.0:
        raise fail("channel_max_step",
                   "a channel range where the law is not flat: the channel step limit gives no "
                   f"set-point step where the channel reaches 0 {channel_unit}; narrow "
                   "channel_limit_min/channel_limit_max away from 0", max_step)

    safe_given, channel_safe_given = declared.safe, declared.channel_safe
    if safe_given is not None:
        safe = safe_given
        if not low <= safe <= high:
            raise fail("safe", f"a value within the effective limits [{_fmt(low)}, {_fmt(high)}] "
                               f"{unit}", safe)
        channel_safe = law.to_channel(safe)
        channel_safe = min(max(channel_safe, channel_low), channel_high)
    else:
        key = "channel_safe"
        channel_safe_value = channel_safe_given if channel_safe_given is not None else driver.safe
        if channel_safe_value is None:
            raise fail("safe", "a safe value: safe or channel_safe here, or safe in the driver's "
                               "channel description", "none")
        if channel_safe_given is None:
            key = "channel_safe (from the driver)"
        slack = _ROUNDING * max(abs(channel_low), abs(channel_high), 1e-300)
        if not channel_low - slack <= channel_safe_value <= channel_high + slack:
            raise fail(key, f"a value within the effective channel limits [{_fmt(channel_low)}, "
                            f"{_fmt(channel_high)}] {channel_unit}", channel_safe_value)
        channel_safe = channel_safe_value
        safe = min(max(law.to_setpoint(channel_safe), low), high)
    tolerance = declared.channel_readback_tolerance
    step_in_channel = declared.channel_max_step
    if driver.max_step is not None:
        step_in_channel = driver.max_step if step_in_channel is None else min(step_in_channel, driver.max_step)
    return MappedSetpoint(name=name, unit=unit, channel=channel, channel_unit=channel_unit, law=law,
                          min=low, max=high, max_step=max_step, channel_min=channel_low,
                          channel_max=channel_high, channel_max_step=step_in_channel, safe=safe,
                          channel_safe=channel_safe, channel_readback_tolerance=tolerance)


def _declared(declaration: Any, name: str, file: str, where: str) -> _Linear | _Stark:
    """One ``[setpoints.NAME]`` table checked against its law's keys (every problem at once).

    Raises
    ------
    FileErrors
        Every problem of the table.
    """
    kind = declaration.get("law", "nothing") if isinstance(declaration, Mapping) else None
    if kind is not None and kind not in _LAWS:
        raise FileErrors([ConfigError(file, f"{where}.law", "'linear' or 'stark'", kind)])
    if kind == "stark" and SETPOINT_UNITS[name] != "Hz":
        raise FileErrors([ConfigError(file, f"{where}.law", "the stark law only for a detuning "
                                      "(unit Hz)", f"{kind} for {name} in {SETPOINT_UNITS[name]}")])
    return check(_LAWS[kind or "linear"], declaration, file=file, prefix=where)


def _mapped(name: str, declared: _Linear | _Stark, driver_channels: Mapping[str, ChannelInfo],
            used: dict[str, str], fail: Callable[[str, str, object], ConfigError]
            ) -> MappedSetpoint:
    """The rules between a checked table, the protocol and the driver (the first that does not
    hold raises ``fail(key, expected, got)``); the mapped set-point."""
    unit, channel, channel_unit = declared.unit, declared.channel, declared.channel_unit
    if unit != SETPOINT_UNITS[name]:
        raise fail("unit", f"the protocol's unit of {name}, {SETPOINT_UNITS[name]!r}", unit)
    if channel in used:
        raise fail("channel", f"a channel not already mapped (by {used[channel]})", channel)
    info = driver_channels.get(channel)
    if info is None:
        raise fail("channel", f"a channel the driver describes: "
                   f"{', '.join(sorted(driver_channels)) or 'none'}", channel)
    if info.unit != channel_unit:
        raise fail("channel_unit", f"the driver's unit of {channel}, {info.unit!r}", channel_unit)
    used[channel] = name
    return _resolve(name, declared, declared.law_of(), info, fail)


def channel_map_from_table(table: Any, driver_channels: Mapping[str, ChannelInfo], *,
                           file: str = "<memory>", prefix: str = "setpoints") -> ChannelMap:
    """Build a channel map from the ``[setpoints.NAME]`` tables of a DRIVER.toml.

    Parameters
    ----------
    table : Mapping
        The ``setpoints`` table: set-point name to its declaration.
    driver_channels : Mapping[str, ChannelInfo]
        The channels the driver describes (unit, optional limits and safe value).
    file, prefix : str
        Where the table came from, for error messages.

    Returns
    -------
    ChannelMap

    Raises
    ------
    ConfigError
        Naming the file, the dotted key, what was expected and what was found, for any wrong,
        missing, unknown or inconsistent value (a channel the driver lacks, a unit that differs
        from the driver's, limits that do not overlap, no limit, no step, no safe value).
        Every problem of every table at once (:class:`~autotune.errors.FileErrors`): the
        keys' types and bounds (:mod:`autotune.schema`) and the range a lab could mean
        (:mod:`autotune.plausible`), then, for a table whose keys are all right, the first
        rule between its keys, the protocol and the driver that does not hold.
    """
    if not isinstance(table, Mapping) or not table:
        raise ConfigError(file, prefix, "a table [setpoints.NAME] per set-point (velocity, detuning)", table)
    problems: list[ConfigError] = []
    mapped: dict[str, MappedSetpoint] = {}
    used: dict[str, str] = {}
    for name, declaration in table.items():
        where = f"{prefix}.{name}"
        if name not in SETPOINT_UNITS:
            problems.append(ConfigError(file, where, f"a set-point of the protocol: "
                                        f"{', '.join(SETPOINT_UNITS)}", name))
            continue
        try:
            declared = _declared(declaration, name, file, where)
        except ConfigErrors as exc:
            wrong = {problem.key for problem in exc.problems}
            problems += exc.problems + [problem for problem in _implausible(
                declaration, file, where, name) if problem.key not in wrong] \
                if isinstance(declaration, Mapping) else exc.problems
            continue
        if implausible := _implausible(declaration, file, where, name):
            problems += implausible  # the rules below would only echo a slipped unit
            continue
        try:
            mapped[name] = _mapped(name, declared, driver_channels, used, _at(file, where))
        except ConfigError as exc:
            problems.append(exc)
    if problems:
        raise FileErrors(problems)
    return ChannelMap(mapped)


def identity_channel_map(driver_channels: Mapping[str, ChannelInfo], *, source: str = "<driver>") -> ChannelMap:
    """Map each protocol set-point to the driver's channel of the same name and unit, unchanged.

    Limits, steps and safe values all come from the driver's channel description. Channels
    with other names are left out.

    Raises
    ------
    ConfigError
        If no channel qualifies, or one lacks limits, a step or a safe value.
    """
    table = {name: {"unit": unit, "channel": name, "channel_unit": unit, "law": "linear", "scale": 1.0}
             for name, unit in SETPOINT_UNITS.items()
             if name in driver_channels and driver_channels[name].unit == unit}
    if not table:
        raise ConfigError(source, "channels", f"channels named like the set-points ({', '.join(SETPOINT_UNITS)}) "
                                              "in their units", sorted(driver_channels))
    return channel_map_from_table(table, driver_channels, file=source, prefix="channels")
