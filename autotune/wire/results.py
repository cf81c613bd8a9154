"""The results of the ops, read into typed objects (see :mod:`autotune.wire.protocol`): what a rig
describes, applied, acquired, reports of its status, and its lease."""

from __future__ import annotations

import math
import types
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Annotated, Any, TypeVar

from pydantic import Strict

from autotune.errors import LimitError, ProtocolError, ValueRefused
from autotune import schema
from autotune.wire.codec import FINITE, is_number, show_value, wire_detail
from autotune.wire.terms import MAX_SHOTS, PROTO_VERSION

__all__ = ["SetpointLimit", "Description", "Applied", "Counts", "Acquisition", "Status",
           "parse_description", "parse_applied", "parse_acquisition", "parse_status", "parse_safe",
           "parse_truth", "parse_advance", "parse_thermal_step", "Lease", "parse_claim",
           "parse_release"]

_T = TypeVar("_T")


_COUNT = schema.integer(0)
_STRING = Annotated[str, Strict()]
_FLAG = Annotated[bool, Strict()]
_VALUES = Annotated[dict[str, FINITE], schema.Expect("an object of name: number")]
# Left out, the rig reports no identity; an explicit null is refused.
_INSTANCE = schema.text("1 to 64 characters of [0-9A-Za-z_-]",
                        pattern=r"^[0-9A-Za-z_-]{1,64}$")


def _parsed(cls: type[_T], result: object, where: str) -> _T:
    """A result checked against its table (:mod:`autotune.schema`; keys a newer rig adds are
    ignored); every problem in one :class:`ProtocolError`."""
    if not isinstance(result, Mapping):
        raise ProtocolError(f"{where}: expected an object, got {show_value(result)}")
    return schema.check(cls, result, file=where, prefix=where,
                        error=lambda problems: ProtocolError(wire_detail(problems)))


@dataclass(frozen=True)
class SetpointLimit:
    """Limits of one set-point.

    Attributes
    ----------
    unit : str
        The SI unit of the set-point (``"m/s"``, ``"Hz"``).
    min, max : float
        Inclusive bounds, in ``unit``.
    max_step : float
        Largest allowed change in one ``apply``, in ``unit`` (> 0).
    """

    unit: str
    min: float
    max: float
    max_step: float

    def __post_init__(self) -> None:
        for name in ("min", "max", "max_step"):
            value = getattr(self, name)
            if not is_number(value) or not math.isfinite(value):
                raise ValueRefused(f"SetpointLimit.{name}: expected a finite number, got {value!r}")
            object.__setattr__(self, name, float(value))
        if not isinstance(self.unit, str):
            raise ValueRefused(f"SetpointLimit.unit: expected a string, got {self.unit!r}")
        if self.min > self.max:
            raise ValueRefused(f"SetpointLimit: expected min <= max, got min={self.min!r}, max={self.max!r}")
        if self.max_step <= 0:
            raise ValueRefused(f"SetpointLimit.max_step: expected a number > 0, got {self.max_step!r}")

    def check(self, name: str, value: float) -> None:
        """Raise :class:`~autotune.errors.LimitError` unless ``value`` is finite and within
        [min, max] (the step from the value in force is checked where that value is known)."""
        if not math.isfinite(value):
            raise LimitError(f"set-point {name}: value {value!r} is not finite")
        if value < self.min or value > self.max:
            raise LimitError(
                f"set-point {name}: {value:g} is outside its limits [{self.min:g}, {self.max:g}]"
            )

    def tighter(self, other: SetpointLimit) -> SetpointLimit:
        """Return the intersection of two limits (the tighter bound of each).

        Raises
        ------
        ValueError
            If the units differ or the ranges do not overlap.
        """
        if self.unit != other.unit:
            raise ValueRefused(f"units differ: {self.unit!r} and {other.unit!r}")
        low, high = max(self.min, other.min), min(self.max, other.max)
        if low > high:
            raise ValueRefused(
                f"ranges [{self.min}, {self.max}] and [{other.min}, {other.max}] do not overlap"
            )
        return SetpointLimit(self.unit, low, high, min(self.max_step, other.max_step))


@schema.table(extra="ignore")
class _Limit:
    unit: _STRING
    min: FINITE
    max: FINITE
    max_step: schema.number(0.0, low_open=True)

    def __post_init__(self) -> None:
        if self.min > self.max:
            schema.refuse("max", f"a number >= min = {self.min!r}", self.max)


@dataclass(frozen=True)
class Description:
    """What a rig says about itself (result of ``describe``).

    Attributes
    ----------
    rig : str
        The rig's name.
    proto : int
        Protocol version it speaks.
    simulated : bool
        True for a simulated rig.
    setpoints : Mapping[str, SetpointLimit]
        Limits per set-point name.
    fields : tuple of str
        Field states it can prepare.
    repetition_rate_hz : float
        Shots per second, Hz.
    safe_setpoints : Mapping[str, float]
        The values ``safe`` moves to, in each set-point's unit.
    instance : str or None
        The rig's identity, new at every start (``None`` if the rig does not report one).
    max_shots_per_acquisition : int
        The most shots one ``acquire`` accepts (:data:`MAX_SHOTS` if the rig does not say).
    """

    rig: str
    proto: int
    simulated: bool
    setpoints: Mapping[str, SetpointLimit]
    fields: tuple[str, ...]
    repetition_rate_hz: float
    safe_setpoints: Mapping[str, float]
    instance: str | None = None
    max_shots_per_acquisition: int = MAX_SHOTS


@schema.table(extra="ignore")
class _Described:
    proto: Annotated[schema.integer(PROTO_VERSION, PROTO_VERSION),
                     schema.Expect(f"{PROTO_VERSION}")]
    rig: _STRING
    simulated: _FLAG
    setpoints: Annotated[dict[str, _Limit], schema.Expect("an object of name: limits")]
    fields: Annotated[list[_STRING], schema.Expect("an array of strings")]
    repetition_rate_hz: schema.number(0.0, low_open=True)
    safe_setpoints: _VALUES
    instance: _INSTANCE = None
    max_shots_per_acquisition: schema.integer(1) = MAX_SHOTS


def parse_description(result: Mapping[str, Any]) -> Description:
    """Turn a ``describe`` result into a :class:`Description` (raises ProtocolError)."""
    found = _parsed(_Described, result, "describe result")
    return Description(
        rig=found.rig, proto=found.proto, simulated=found.simulated,
        setpoints=types.MappingProxyType({name: SetpointLimit(
            limit.unit, limit.min, limit.max, limit.max_step)
            for name, limit in found.setpoints.items()}),
        fields=tuple(found.fields), repetition_rate_hz=found.repetition_rate_hz,
        safe_setpoints=types.MappingProxyType(found.safe_setpoints), instance=found.instance,
        max_shots_per_acquisition=found.max_shots_per_acquisition)


@dataclass(frozen=True)
class Applied:
    """Set-points in force after ``apply`` or ``safe``.

    Attributes
    ----------
    setpoints : Mapping[str, float]
        Every set-point in force, in its unit.
    clock : float or None
        Rig clock after the change, s; ``None`` for ``safe``, whose reply has no clock.
    instance : str or None
        The rig's identity, if it reports one.
    """

    setpoints: Mapping[str, float]
    clock: float | None
    instance: str | None = None


@schema.table(extra="ignore")
class _Safe:
    setpoints: _VALUES
    instance: _INSTANCE = None


@schema.table(extra="ignore", kw_only=True)
class _Applied(_Safe):
    clock: FINITE


def parse_applied(result: Mapping[str, Any]) -> Applied:
    """Turn an ``apply`` result into :class:`Applied` (raises ProtocolError)."""
    found = _parsed(_Applied, result, "apply result")
    return Applied(types.MappingProxyType(found.setpoints), found.clock, found.instance)


def parse_safe(result: Mapping[str, Any]) -> Applied:
    """Turn a ``safe`` result into :class:`Applied` with ``clock=None`` (raises ProtocolError)."""
    found = _parsed(_Safe, result, "safe result")
    return Applied(types.MappingProxyType(found.setpoints), None, found.instance)


@schema.table(extra="ignore")
class Counts:
    """Detected atoms per state.

    Attributes
    ----------
    e, g, i : int
        Atoms assigned to the upper, lower and reference level.
    """

    e: _COUNT
    g: _COUNT
    i: _COUNT

    @property
    def detected(self) -> int:
        """Total detected atoms."""
        return self.e + self.g + self.i


@dataclass(frozen=True)
class Acquisition:
    """Result of ``acquire``.

    Attributes
    ----------
    counts : Counts
        Detected atoms per state.
    shots : int
        Shots (samples) taken.
    t_start, t_end : float
        Rig clock at start and end, s.
    setpoints : Mapping[str, float]
        Set-points in force during the acquisition.
    instance : str or None
        The rig's identity, if it reports one.
    """

    counts: Counts
    shots: int
    t_start: float
    t_end: float
    setpoints: Mapping[str, float]
    instance: str | None = None


@schema.table(extra="ignore")
class _Acquired:
    counts: Annotated[Counts, schema.Expect("an object of e, g, i")]
    shots: schema.integer(1)
    t_start: FINITE
    t_end: FINITE
    setpoints: _VALUES
    instance: _INSTANCE = None

    def __post_init__(self) -> None:
        # The rig clock never runs backwards within an acquisition.
        if self.t_end < self.t_start:
            schema.refuse("t_end", f"a time >= t_start = {self.t_start!r}", self.t_end)


def parse_acquisition(result: Mapping[str, Any]) -> Acquisition:
    """Turn an ``acquire`` result into :class:`Acquisition` (raises ProtocolError)."""
    found = _parsed(_Acquired, result, "acquire result")
    return Acquisition(counts=found.counts,
                       shots=found.shots, t_start=found.t_start, t_end=found.t_end,
                       setpoints=types.MappingProxyType(found.setpoints), instance=found.instance)


@dataclass(frozen=True)
class Status:
    """Result of ``status``.

    Attributes
    ----------
    clock : float
        Rig clock, s.
    busy : bool
        True while the rig cannot take requests.
    interlock : str or None
        The interlock set, if any.
    setpoints : Mapping[str, float]
        Set-points in force.
    shots_total : int
        Shots acquired since the rig started.
    instance : str or None
        The rig's identity, if it reports one.
    """

    clock: float
    busy: bool
    interlock: str | None
    setpoints: Mapping[str, float]
    shots_total: int
    instance: str | None = None


@schema.table(extra="ignore")
class _Status:
    clock: FINITE
    busy: _FLAG
    interlock: Annotated[_STRING | None, schema.Expect("null or a string")]
    setpoints: _VALUES
    shots_total: _COUNT
    instance: _INSTANCE = None


def parse_status(result: Mapping[str, Any]) -> Status:
    """Turn a ``status`` result into :class:`Status` (raises ProtocolError)."""
    found = _parsed(_Status, result, "status result")
    return Status(clock=found.clock, busy=found.busy, interlock=found.interlock,
                  setpoints=types.MappingProxyType(found.setpoints),
                  shots_total=found.shots_total, instance=found.instance)


@schema.table(extra="ignore")
class _Clock:
    clock: FINITE


@schema.table(extra="ignore", kw_only=True)
class _Truth(_Clock):
    setpoints: _VALUES


@schema.table(extra="ignore", kw_only=True)
class _Stepped(_Clock):
    cavity_offset_hz: FINITE


def parse_truth(result: Mapping[str, Any]) -> dict[str, Any]:
    """Check a ``truth`` result's outline (set-points, clock) and return it as a dict."""
    _parsed(_Truth, result, "truth result")
    return dict(result)


def parse_advance(result: Mapping[str, Any]) -> dict[str, Any]:
    """Check an ``advance`` result (``clock``) and return it as a dict."""
    _parsed(_Clock, result, "advance result")
    return dict(result)


def parse_thermal_step(result: Mapping[str, Any]) -> dict[str, Any]:
    """Check a ``thermal_step`` result (``clock``, ``cavity_offset_hz``) and return it as a dict."""
    _parsed(_Stepped, result, "thermal_step result")
    return dict(result)


@schema.table(extra="ignore")
class Lease:
    """Result of ``claim``: the lease this client now holds.

    Attributes
    ----------
    holder : str
        The client identity holding it (this client's).
    ttl_s : float
        The lease's time to live, s.
    expires_in_s : float
        Seconds until it runs out unless renewed.
    renewed : bool
        True when this client already held it.
    """

    holder: _STRING
    ttl_s: FINITE
    expires_in_s: FINITE
    renewed: _FLAG


@schema.table(extra="ignore")
class _Released:
    released: _FLAG


def parse_claim(result: Mapping[str, Any]) -> Lease:
    """Turn a ``claim`` result into :class:`Lease` (raises ProtocolError)."""
    return _parsed(Lease, result, "claim result")


def parse_release(result: Mapping[str, Any]) -> bool:
    """Turn a ``release`` result into whether a lease was released (raises ProtocolError)."""
    return _parsed(_Released, result, "release result").released
