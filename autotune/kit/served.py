"""A rig driver behind the protocol's operations: checks, channel map, read-backs.

:class:`ServedDriver` turns a lab's driver (:mod:`autotune.driver`, in its own channels and
units) into an object with the protocol's operations (``describe``, ``apply``, ``acquire``,
``status``, ``safe``, and the simulated-only ones when the driver has them) returning the
protocol's result dicts. :class:`autotune.kit.server.RigServer` serves such an object over ZeroMQ.

What it does around each driver call:

- ``apply``: reads ``status`` first; refuses with ``interlock`` or ``busy`` if the rig reports
  one; takes the set-points in force from the read-backs; checks every requested set-point in
  both units (limits and steps, :meth:`autotune.kit.channels.ChannelMap.plan_apply`); only then
  calls the driver with channel values; reads ``status`` again for the result.
- ``acquire``: refuses shot counts above the driver's maximum (``bad_request``) and refuses
  under interlock or busy; after the driver's acquisition, reads ``status`` for the
  set-points in force.
- ``safe``: sends the map's safe channel values to the driver's own safe procedure (no step
  limit, also under interlock).
- Set-points in force: the value last commanded while the channel's read-back agrees with it
  (within ``channel_readback_tolerance``); otherwise the read-back through the law, so a client
  sees at once that the hardware is not where it was sent.

A driver result of the wrong shape is the driver's failure: :class:`DriverResultError`, which
the server answers with ``internal``.
"""

from __future__ import annotations

import contextlib
import math
import numbers
import time
import types
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import structlog

from autotune.wire import protocol
from autotune.kit.channels import ChannelInfo, ChannelMap, channel_map_from_table, identity_channel_map
from autotune.kit.driver import COUNT_STATES, FIELDS, SIMULATED_OPS
from autotune.errors import BadRequest, Busy, ConfigError, InterlockSet
from autotune.kit.server import mark_ran

__all__ = ["ServedDriver", "DriverDescription", "DriverStatus", "DriverResultError",
           "parse_driver_description"]

_log = structlog.get_logger(__name__)


class DriverResultError(RuntimeError):
    """A driver method returned something other than the interface asks (answered ``internal``)."""


@contextlib.contextmanager
def _acted() -> Iterator[None]:
    """The part of an op after the driver acted (read-backs, result checks): whatever fails
    there is marked as a request that ran, so the server keeps its ``internal`` reply and never
    runs the request twice (:func:`autotune.kit.server.mark_ran`)."""
    try:
        yield
    except BaseException as exc:
        raise mark_ran(exc)


def _is_real(value: object) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def _is_integer(value: object) -> bool:
    return isinstance(value, numbers.Integral) and not isinstance(value, bool)


def _need(result: Any, key: str, where: str) -> Any:
    if not isinstance(result, Mapping):
        raise DriverResultError(f"{where}: expected a dict, got {type(result).__name__}")
    if key not in result:
        raise DriverResultError(f"{where}: missing key {key!r}")
    return result[key]


def _real(result: Any, key: str, where: str) -> float:
    value = _need(result, key, where)
    if not _is_real(value) or not math.isfinite(float(value)):
        raise DriverResultError(f"{where}.{key}: expected a finite number, got {value!r}")
    return float(value)


def _count(result: Any, key: str, where: str) -> int:
    value = _need(result, key, where)
    if not _is_integer(value) or int(value) < 0:
        raise DriverResultError(f"{where}.{key}: expected an integer >= 0, got {value!r}")
    return int(value)


@dataclass(frozen=True)
class DriverDescription:
    """A driver's ``describe()`` result, checked.

    Attributes
    ----------
    rig : str
        The rig's name.
    repetition_rate_hz : float
        Shots per second, Hz (> 0).
    simulated : bool
        True for a simulated rig.
    max_shots_per_acquisition : int or None
        The most shots one acquisition takes, if the driver says.
    channels : Mapping[str, ChannelInfo]
        The driver's channels.
    """

    rig: str
    repetition_rate_hz: float
    simulated: bool
    max_shots_per_acquisition: int | None
    channels: Mapping[str, ChannelInfo]


def parse_driver_description(result: Any, *, source: str = "<driver>") -> DriverDescription:
    """Check a driver's ``describe()`` result.

    Raises
    ------
    ConfigError
        Naming ``driver.describe()`` and the key, for a result of the wrong shape.
    """
    where = "driver.describe()"

    def fail(key: str, expected: str, got: object) -> ConfigError:
        return ConfigError(source, f"{where}.{key}" if key else where, expected, got)

    if not isinstance(result, Mapping):
        raise fail("", "a dict", type(result).__name__)
    allowed = {"rig", "repetition_rate_hz", "channels", "simulated", "max_shots_per_acquisition"}
    unknown = sorted(str(k) for k in result if k not in allowed)
    if unknown:
        raise fail(unknown[0], f"one of {', '.join(sorted(allowed))}", unknown[0])
    rig = result.get("rig")
    if not isinstance(rig, str) or not rig:
        raise fail("rig", "a non-empty string", rig)
    rate = result.get("repetition_rate_hz")
    if not _is_real(rate) or not (math.isfinite(float(rate)) and float(rate) > 0):
        raise fail("repetition_rate_hz", "a finite number > 0 (shots per second)", rate)
    simulated = result.get("simulated", False)
    if not isinstance(simulated, bool):
        raise fail("simulated", "true or false", simulated)
    max_shots = result.get("max_shots_per_acquisition")
    if max_shots is not None and (not _is_integer(max_shots) or not 1 <= int(max_shots) <= protocol.MAX_SHOTS):
        raise fail("max_shots_per_acquisition", f"an integer in [1, {protocol.MAX_SHOTS}]", max_shots)
    raw_channels = result.get("channels")
    if not isinstance(raw_channels, Mapping) or not raw_channels:
        raise fail("channels", "a dict of channel name to {'unit': str, ...}", raw_channels)
    channels: dict[str, ChannelInfo] = {}
    for name, info in raw_channels.items():
        key = f"channels.{name}"
        if not isinstance(name, str) or not name:
            raise fail("channels", "non-empty channel names", name)
        if not isinstance(info, Mapping):
            raise fail(key, "a dict with 'unit' and optional 'min', 'max', 'max_step', 'safe'", info)
        extra = sorted(str(k) for k in info if k not in ("unit", "min", "max", "max_step", "safe"))
        if extra:
            raise fail(f"{key}.{extra[0]}", "one of unit, min, max, max_step, safe", extra[0])
        unit = info.get("unit")
        if not isinstance(unit, str) or not unit:
            raise fail(f"{key}.unit", "a non-empty string", unit)
        values: dict[str, float | None] = {}
        for limit in ("min", "max", "max_step", "safe"):
            value = info.get(limit)
            if value is not None and (not _is_real(value) or not math.isfinite(float(value))):
                raise fail(f"{key}.{limit}", "a finite number", value)
            values[limit] = None if value is None else float(value)
        if values["max_step"] is not None and values["max_step"] <= 0:
            raise fail(f"{key}.max_step", "a number > 0", values["max_step"])
        if values["min"] is not None and values["max"] is not None and values["min"] > values["max"]:
            raise fail(f"{key}.max", f"a number >= min {values['min']}", values["max"])
        channels[name] = ChannelInfo(unit, **values)
    return DriverDescription(rig=rig, repetition_rate_hz=float(rate), simulated=simulated,
                             max_shots_per_acquisition=None if max_shots is None else int(max_shots),
                             channels=types.MappingProxyType(channels))


@dataclass(frozen=True)
class DriverStatus:
    """A driver's ``status()`` result, checked.

    Attributes
    ----------
    clock : float
        Rig clock, s.
    busy : bool
        True while the rig cannot take requests.
    interlock : str or None
        The interlock set, if any.
    channels : Mapping[str, float]
        Channel read-backs, each channel's unit.
    shots_total : int
        Shots acquired since the driver started.
    """

    clock: float
    busy: bool
    interlock: str | None
    channels: Mapping[str, float]
    shots_total: int


def _parse_status(result: Any, mapped: tuple[str, ...]) -> DriverStatus:
    where = "driver.status()"
    busy = _need(result, "busy", where)
    if not isinstance(busy, bool):
        raise DriverResultError(f"{where}.busy: expected true or false, got {busy!r}")
    interlock = _need(result, "interlock", where)
    if interlock is not None and (not isinstance(interlock, str) or not interlock):
        raise DriverResultError(f"{where}.interlock: expected None or a non-empty string, got {interlock!r}")
    raw = _need(result, "channels", where)
    if not isinstance(raw, Mapping):
        raise DriverResultError(f"{where}.channels: expected a dict of channel: read-back, got {raw!r}")
    channels = {}
    for channel in mapped:
        if channel not in raw:
            raise DriverResultError(f"{where}.channels: missing the read-back of mapped channel {channel!r}")
        channels[channel] = _real(raw, channel, f"{where}.channels")
    return DriverStatus(clock=_real(result, "clock", where), busy=busy, interlock=interlock,
                        channels=types.MappingProxyType(channels),
                        shots_total=_count(result, "shots_total", where))


class ServedDriver:
    """A lab's driver with the protocol's operations (see the module docstring).

    Parameters
    ----------
    driver : object
        The driver (:class:`autotune.driver.RigDriver`).
    setpoints : Mapping, optional
        The ``[setpoints]`` table of DRIVER.toml (the channel map); by default each set-point
        maps unchanged to the driver's channel of the same name (limits from the driver).
    source : str
        Where ``setpoints`` came from, for error messages.

    Raises
    ------
    ConfigError
        If the driver's description or the channel map is wrong, or the driver's first status
        lacks a mapped channel. Exceptions of the driver's own ``describe``/``status`` pass
        through unchanged (the rig failed at start-up).
    """

    def __init__(self, driver: Any, setpoints: Mapping[str, Any] | None = None, *,
                 source: str = "<memory>") -> None:
        for method in ("describe", "apply", "acquire", "status", "safe"):
            if not callable(getattr(driver, method, None)):
                raise ConfigError(source, "driver.class", f"a class with a {method}() method "
                                  "(see autotune.driver)", type(driver).__name__)
        # Every call of the driver goes through the watch: a stopping server names the one
        # it waits for.
        self._driver = _CallWatch(driver)
        self._description = parse_driver_description(self._driver.describe(), source=source)
        channels = self._description.channels
        if setpoints is None:
            self._map = identity_channel_map(channels, source=source)
        else:
            self._map = channel_map_from_table(setpoints, channels, file=source)
        self._channels = tuple(self._map[name].channel for name in self._map)
        self._commanded: dict[str, tuple[float, float]] = {}
        self._log = _log.bind(rig=self._description.rig)
        try:
            self._read_status()
        except DriverResultError as exc:
            raise ConfigError(source, "driver.status()", "a status as autotune.driver states it (clock, "
                              "busy, interlock None or a non-empty string, every mapped channel's "
                              "read-back, shots_total)", str(exc)) from None
        for op in SIMULATED_OPS:
            if callable(getattr(driver, op, None)):
                setattr(self, op, getattr(self._driver, op))

    @property
    def driver(self) -> Any:
        """The driver served."""
        return self._driver.driver

    @property
    def call_in_progress(self) -> tuple[str, float] | None:
        """The driver method running now and for how long (s), or None (any thread may ask)."""
        return self._driver.in_progress()

    @property
    def channel_map(self) -> ChannelMap:
        """The channel map in use."""
        return self._map

    @property
    def description(self) -> DriverDescription:
        """The driver's checked description (read once, at start)."""
        return self._description

    # ------------------------------------------------------------------ helpers

    def _read_status(self) -> DriverStatus:
        return _parse_status(self._driver.status(), self._channels)

    def _in_force(self, status: DriverStatus) -> dict[str, Any]:
        in_force = self._map.in_force(status.channels, self._commanded)
        for name, value in in_force.items():
            if not value.as_commanded and name in self._commanded:
                m = self._map[name]
                self._log.warning("readback_differs", setpoint=name, channel=m.channel,
                                  commanded=self._commanded[name][1], readback=value.channel,
                                  tolerance=m.channel_readback_tolerance,
                                  reason="the read-back no longer matches the commanded value; "
                                         "reporting the read-back")
                del self._commanded[name]
        return in_force

    def _refuse_if_not_ready(self, op: str, status: DriverStatus) -> None:
        if status.interlock is not None:
            raise InterlockSet(f"{op} refused: interlock set ({status.interlock})")
        if status.busy:
            raise Busy(f"{op} refused: the rig reports busy; retry later")

    # ------------------------------------------------------------------ the ops

    def describe(self) -> dict[str, Any]:
        """The ``describe`` result: the map's limits in set-point units and the driver's facts."""
        d = self._description
        result: dict[str, Any] = {
            "rig": d.rig,
            "proto": protocol.PROTO_VERSION,
            "simulated": d.simulated,
            "setpoints": self._map.describe_setpoints(),
            "fields": list(FIELDS),
            "repetition_rate_hz": d.repetition_rate_hz,
            "safe_setpoints": self._map.safe_setpoints(),
        }
        if d.max_shots_per_acquisition is not None:
            result["max_shots_per_acquisition"] = d.max_shots_per_acquisition
        return result

    def status(self) -> dict[str, Any]:
        """The ``status`` result, set-points from the read-backs."""
        status = self._read_status()
        in_force = self._in_force(status)
        return {"clock": status.clock, "busy": status.busy, "interlock": status.interlock,
                "setpoints": {name: v.setpoint for name, v in in_force.items()},
                "shots_total": status.shots_total}

    def apply(self, setpoints: Mapping[str, float]) -> dict[str, Any]:
        """Check and apply set-points (partial allowed); the ``apply`` result.

        Raises
        ------
        OutOfRange
            For a name, value or step outside the map's limits (the driver is not called).
        InterlockSet, Busy
            If the rig reports an interlock or busy (the driver is not called).
        """
        before = self._read_status()
        self._refuse_if_not_ready("apply", before)
        channels = self._map.plan_apply(setpoints, self._in_force(before))
        for name in setpoints:
            # Until the driver returns, what is in force is whatever the read-back says.
            self._commanded.pop(name, None)
        self._driver.apply(dict(channels))
        with _acted():
            for name, value in setpoints.items():
                self._commanded[name] = (float(value), channels[self._map[name].channel])
            after = self._read_status()
            in_force = self._in_force(after)
        return {"setpoints": {name: v.setpoint for name, v in in_force.items()}, "clock": after.clock}

    def acquire(self, field: str, ramsey_phase: float, shots: int) -> dict[str, Any]:
        """Acquire through the driver; the ``acquire`` result with the set-points in force.

        Raises
        ------
        BadRequest
            For an unknown field or more shots than the driver takes.
        InterlockSet, Busy
            If the rig reports an interlock or busy (the driver is not called).
        """
        if field not in FIELDS:
            raise BadRequest(f"field: expected one of {list(FIELDS)}, got {field!r}")
        limit = self._description.max_shots_per_acquisition
        if limit is not None and shots > limit:
            raise BadRequest(f"shots: expected an integer in [1, {limit}] (this rig's "
                             f"max_shots_per_acquisition), got {shots}")
        self._refuse_if_not_ready("acquire", self._read_status())
        where = "driver.acquire()"
        result = self._driver.acquire(field, float(ramsey_phase), int(shots))
        with _acted():
            raw = _need(result, "counts", where)
            counts = {state: _count(raw, state, f"{where}.counts") for state in COUNT_STATES}
            t_start, t_end = _real(result, "t_start", where), _real(result, "t_end", where)
            if t_end < t_start:
                raise DriverResultError(f"{where}: expected t_end >= t_start, got {t_start!r} "
                                        f"and {t_end!r}")
            after = self._in_force(self._read_status())
        return {"counts": counts, "shots": int(shots), "t_start": t_start, "t_end": t_end,
                "setpoints": {name: v.setpoint for name, v in after.items()}}

    def safe(self) -> dict[str, Any]:
        """Send the safe channel values to the driver's safe procedure; the ``safe`` result."""
        self._commanded.clear()
        self._driver.safe(self._map.safe_channels())
        with _acted():
            for name, m in self._map.setpoints.items():
                self._commanded[name] = (m.safe, m.channel_safe)
            in_force = self._in_force(self._read_status())
        self._log.info("safe_setpoints_applied", setpoints={n: v.setpoint for n, v in in_force.items()})
        return {"setpoints": {name: v.setpoint for name, v in in_force.items()}}

    def close(self) -> None:
        """Close the driver if it has a ``close()``."""
        if callable(getattr(self._driver.driver, "close", None)):
            self._driver.close()


class _CallWatch:
    """The driver, with the method running now (its name and start) known to other threads: a
    server asked to stop names the call it waits for."""

    def __init__(self, driver: Any) -> None:
        self.driver = driver
        self._current: tuple[str, float] | None = None

    def in_progress(self) -> tuple[str, float] | None:
        current = self._current
        return None if current is None else (current[0], time.monotonic() - current[1])

    def __getattr__(self, name: str) -> Any:
        method = getattr(self.driver, name)
        if not callable(method):
            return method

        def watched(*args: Any, **kwargs: Any) -> Any:
            self._current = (name, time.monotonic())
            try:
                return method(*args, **kwargs)
            finally:
                self._current = None

        return watched
