"""The guard of every move: the effective limits of each set-point (the tighter of the
configured and the described, as the wire's :class:`~autotune.wire.protocol.SetpointLimit`,
the one limit type of autotune), the split of a long move into allowed steps, a retune's box
within the limits, and the budget a search must stop at.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from autotune.config import RunConfig
from autotune.errors import ConfigError, LimitError
from autotune.wire.protocol import STEP_TOLERANCE, SetpointLimit

__all__ = ["Budget", "configured_limit", "effective_limit", "effective_limits", "plan_moves",
           "retune_box", "setpoint_in_force", "holds_setpoints"]


@dataclass(frozen=True)
class Budget:
    """When a search must stop, whatever the strategy says."""

    max_points: int
    max_shots: int
    max_rig_time_s: float
    min_points: int


def setpoint_in_force(reported: float | None, wanted: float) -> bool:
    """Whether a set-point value reported (or journaled) is the one wanted, to float rounding
    (a relative 1e-9, absolute below 1): the one equality of set-points in autotune. None (not
    known) is not in force."""
    return reported is not None and abs(float(reported) - float(wanted)) <= \
        1e-9 * max(1.0, abs(float(wanted)))


def holds_setpoints(current: Mapping[str, float], wanted: Mapping[str, float]) -> bool:
    """Whether ``current`` holds every set-point of ``wanted`` (``current`` may name more),
    each :func:`setpoint_in_force`; a set-point ``current`` does not name is not held."""
    return all(setpoint_in_force(current.get(k), v) for k, v in wanted.items())


def configured_limit(sp: Any) -> SetpointLimit:
    """The limits a run config sets on one set-point (``[setpoints.NAME]``: ``unit``,
    ``limit_min``, ``limit_max``, ``max_step``)."""
    return SetpointLimit(sp.unit, sp.limit_min, sp.limit_max, sp.max_step)


def effective_limit(sp: Any, described: Any) -> SetpointLimit | None:
    """The tighter of the configured limits of ``sp`` and those the rig described for it
    (:meth:`SetpointLimit.tighter <autotune.wire.protocol.SetpointLimit.tighter>`, the one place
    that intersects two limits), or None when the two ranges do not overlap. The caller has
    checked that the units agree.
    """
    try:
        return configured_limit(sp).tighter(described)
    except ValueError:
        return None


def effective_limits(config: RunConfig, description: Any) -> dict[str, SetpointLimit]:
    """The tighter of the configured and the described limits of every searched set-point.

    Raises
    ------
    ConfigError
        A configured set-point is unknown to the rig, its unit differs from the rig's, or its
        limits do not overlap the rig's, or its search box reaches outside the effective limits.
    """
    limits: dict[str, SetpointLimit] = {}
    for sp in config.setpoints:
        described = description.setpoints.get(sp.name)
        key = f"setpoints.{sp.name}"
        if described is None:
            raise ConfigError(config.source, key, "a set-point the rig describes ("
                              + ", ".join(sorted(description.setpoints)) + ")", sp.name)
        if described.unit != sp.unit:
            raise ConfigError(config.source, f"{key}.unit", f"the rig's unit {described.unit!r}",
                              sp.unit)
        limit = effective_limit(sp, described)
        if limit is None:
            raise ConfigError(config.source, f"{key}.limit_min/limit_max",
                              f"limits that overlap the rig's [{described.min:g}, "
                              f"{described.max:g}] {sp.unit}", [sp.limit_min, sp.limit_max])
        if sp.search_min < limit.min or sp.search_max > limit.max:
            raise ConfigError(config.source, f"{key}.search_min/search_max",
                              f"a box within the effective limits [{limit.min:g}, {limit.max:g}]",
                              [sp.search_min, sp.search_max])
        limits[sp.name] = limit
    return limits


def plan_moves(current: Mapping[str, float], target: Mapping[str, float],
               limits: Mapping[str, SetpointLimit]) -> list[dict[str, float]]:
    """Split the move from ``current`` to ``target`` into steps within the largest step.

    All set-points move together along a straight line, in the fewest equal steps that keep
    every set-point's change within its ``max_step``; the last step lands exactly on
    ``target``. Only set-points named in ``target`` move.

    Raises
    ------
    LimitError
        ``target`` names an unknown set-point or a value outside its limits. Nothing is planned.
    """
    for name, value in target.items():
        if name not in limits:
            raise LimitError(f"set-point {name}: not among the limited set-points "
                             + ", ".join(sorted(limits)))
        limits[name].check(name, float(value))
    n_steps = 1
    for name, value in target.items():
        start = current.get(name)
        if start is None:
            raise LimitError(f"set-point {name}: its present value is unknown, cannot bound the step")
        distance = abs(float(value) - float(start))
        max_step = limits[name].max_step
        needed = math.ceil(distance / max_step * (1.0 - STEP_TOLERANCE))
        if needed > 1:
            # Intermediate steps are interpolated, so each carries the rounding of two floats
            # of the size of the set-point: plan them that much below max_step, so that the
            # rig's and the client's step checks never see a step above it.
            room = max_step - 4.0 * sys.float_info.epsilon * max(abs(float(value)),
                                                                abs(float(start)))
            if room <= 0.0:
                raise LimitError(f"set-point {name}: max_step {max_step!r} is below the float "
                                 f"resolution at {float(value)!r}; cannot plan the move")
            needed = max(needed, math.ceil(distance / room))
        n_steps = max(n_steps, needed)
    steps: list[dict[str, float]] = []
    for k in range(1, n_steps + 1):
        if k == n_steps:
            steps.append({name: float(value) for name, value in target.items()})
        else:
            steps.append({
                name: float(current[name]) + (float(value) - float(current[name])) * k / n_steps
                for name, value in target.items()
            })
    for name in target:
        # A rig found outside the limits (left there by hand, or a read-back in another unit
        # than its channel's) cannot be walked in: the first steps would be outside too. Say
        # where the rig is, not only which planned value is refused.
        start = float(current[name])
        limit = limits[name]
        if not limit.min <= start <= limit.max and not limit.min <= steps[0][name] <= limit.max:
            raise LimitError(
                f"set-point {name}: the rig is at {start:g}, outside its limits "
                f"[{limit.min:g}, {limit.max:g}], and the move to {float(target[name]):g} in "
                f"steps of at most {limit.max_step:g} would send {steps[0][name]:g} first; "
                f"no set-point was sent: bring the rig within the limits (or check that its read-back "
                f"is in the channel's unit)")
    return steps


def retune_box(config: RunConfig, centre: Mapping[str, float],
               limits: Mapping[str, SetpointLimit]) -> dict[str, tuple[float, float]]:
    """The narrowed box of a retune: the last good set-points +- half widths, within the limits."""
    box = {}
    for sp in config.setpoints:
        half = config.retune.half_widths[sp.name]
        low = max(centre[sp.name] - half, limits[sp.name].min)
        high = min(centre[sp.name] + half, limits[sp.name].max)
        box[sp.name] = (low, high)
    return box
