"""Tests of the loop's guard: no set-point outside the limits, no step above max_step."""

from __future__ import annotations

import math

import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from autotune.errors import LimitError
from autotune.run.guard import effective_limit, holds_setpoints, setpoint_in_force
from autotune.run.loop import plan_moves, ramsey_phases
from autotune.wire.protocol import SetpointLimit

def _limit(low: float, high: float, max_step: float, unit: str = "m/s") -> SetpointLimit:
    """The one limit type of autotune (the wire's), as the guard reads it: min, max, max_step."""
    return SetpointLimit(unit, low, high, max_step)


finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False, allow_infinity=False)


@st.composite
def boxes_and_moves(draw: st.DrawFn) -> tuple[dict, dict, dict]:
    limits, current, target = {}, {}, {}
    for name in ("velocity", "detuning"):
        lo = draw(finite)
        width = draw(st.floats(min_value=1e-3, max_value=1e6))
        step = draw(st.floats(min_value=1e-3 * width, max_value=2 * width))
        limits[name] = _limit(lo, lo + width, step)
        current[name] = draw(st.floats(min_value=lo, max_value=lo + width))
        # Targets anywhere, inside or outside the box.
        target[name] = draw(st.floats(min_value=lo - width, max_value=lo + 2 * width))
    return limits, current, target


@settings(max_examples=300, deadline=None)
@given(boxes_and_moves())
# Found by hypothesis: a max_step tiny against the set-point's size, where interpolated steps
# carry float rounding above max_step unless planned below it.
@example(({"velocity": _limit(11.999, 12.0, 1e-6), "detuning": _limit(0.0, 1.0, 1.0, "Hz")},
          {"velocity": 12.0, "detuning": 0.0}, {"velocity": 11.999, "detuning": 0.0}))
def test_planned_steps_stay_inside_limits_and_steps(case: tuple[dict, dict, dict]) -> None:
    """Every planned step is inside the limits and within max_step of the previous one."""
    limits, current, target = case
    inside = all(limits[n].min <= v <= limits[n].max for n, v in target.items())
    if not inside:
        with pytest.raises(LimitError, match="outside its limits"):
            plan_moves(current, target, limits)
        return
    steps = plan_moves(current, target, limits)
    assert steps[-1] == target
    previous = dict(current)
    for step in steps:
        for name, value in step.items():
            assert limits[name].min - 1e-9 * abs(limits[name].min) <= value
            assert value <= limits[name].max + 1e-9 * abs(limits[name].max)
            assert abs(value - previous[name]) <= limits[name].max_step * (1 + 1e-9)
        previous = step


def test_non_finite_target_is_refused() -> None:
    """A NaN set-point never gets planned."""
    limits = {"velocity": _limit(300.0, 700.0, 40.0)}
    with pytest.raises(LimitError, match="not finite"):
        plan_moves({"velocity": 500.0}, {"velocity": math.nan}, limits)


def test_unknown_setpoint_is_refused() -> None:
    """A set-point without limits cannot be moved."""
    with pytest.raises(LimitError, match="not among the limited"):
        plan_moves({"velocity": 500.0}, {"voltage": 1.0}, {"velocity": _limit(0, 1, 1)})


def test_long_move_is_split_evenly() -> None:
    """A 100 m/s move with 40 m/s steps takes three equal steps."""
    steps = plan_moves({"velocity": 400.0}, {"velocity": 500.0},
                       {"velocity": _limit(300.0, 700.0, 40.0)})
    assert [s["velocity"] for s in steps] == pytest.approx([433.333333, 466.666667, 500.0])


def test_rig_found_outside_its_limits_is_named_before_anything_moves() -> None:
    """A rig at 562.5 kHz with limits of +-100 kHz (a read-back in V taken as mV, through the
    Stark law) cannot be walked in with 15 kHz steps: the refusal says where the rig is."""
    limits = {"detuning": _limit(-100e3, 100e3, 15e3, "Hz")}
    with pytest.raises(LimitError, match=r"the rig is at 562499, outside its limits \[-100000, 100000\]"):
        plan_moves({"detuning": 562499.0}, {"detuning": 0.0}, limits)


def test_rig_just_outside_its_limits_comes_back_in_one_step() -> None:
    """Within one max_step of a target inside the limits, the one step sent is inside them."""
    steps = plan_moves({"velocity": 705.0}, {"velocity": 690.0}, {"velocity": _limit(300.0, 700.0, 40.0)})
    assert steps == [{"velocity": 690.0}]


def test_effective_limit_is_the_intersection_of_the_configured_and_the_described() -> None:
    """The tighter of two limits: the intersection of the two ranges and the smaller step
    (interval intersection, common practice); None when the ranges do not overlap."""

    class _Configured:
        unit, limit_min, limit_max, max_step = "m/s", 300.0, 650.0, 40.0

    assert effective_limit(_Configured, _limit(350.0, 700.0, 25.0)) == _limit(350.0, 650.0, 25.0)
    assert effective_limit(_Configured, _limit(660.0, 700.0, 25.0)) is None


def test_ramsey_phases_are_equally_spaced() -> None:
    """K phases 2 pi j / K (common practice for a fringe scan)."""
    assert ramsey_phases(4) == pytest.approx((0.0, math.pi / 2, math.pi, 3 * math.pi / 2))


def test_quadratic_peak_finds_the_vertex_of_a_known_parabola() -> None:
    """The vertex of y = 0.7 - 2e-9 (x + 3000)^2 is x = -3000 (elementary algebra: -b / 2a)."""
    from autotune.run.loop import quadratic_peak

    xs = [-9000.0, -6000.0, -3000.0, 0.0, 3000.0]
    ys = [0.7 - 2e-9 * (x + 3000.0) ** 2 for x in xs]
    assert quadratic_peak(xs, ys, [0.01] * 5) == pytest.approx(-3000.0, abs=1e-6)


def test_quadratic_peak_falls_back_to_the_best_point() -> None:
    """A parabola opening upwards, or a vertex outside the scan, gives the best measured x."""
    from autotune.run.loop import quadratic_peak

    assert quadratic_peak([0.0, 1.0, 2.0], [0.5, 0.4, 0.6], [0.01] * 3) == 2.0
    assert quadratic_peak([0.0, 1.0, 2.0], [0.1, 0.2, 0.3], [0.01] * 3) == 2.0


def test_one_equality_of_setpoints_holds_to_float_rounding_and_not_beyond():
    """A set-point is in force when the value reported equals the one wanted to float rounding
    (a relative 1e-9), never when it is unknown; a session holds every set-point it was asked
    for and may know more."""
    # Source: common practice (compare floats within a relative tolerance; Python's
    # math.isclose with rel_tol=1e-9 is the reference here); an unknown state is not assumed.
    for wanted in (505.0, -12_000.0, 0.3, 0.0):
        for reported in (wanted, wanted * (1 + 5e-10) + 1e-10, wanted + 1e-6 * max(1, abs(wanted))):
            expected = math.isclose(reported, wanted, rel_tol=1e-9, abs_tol=1e-9)
            assert setpoint_in_force(reported, wanted) is expected, (reported, wanted)
        assert setpoint_in_force(None, wanted) is False
    held = {"velocity": 505.0, "detuning": 2_000.0}
    assert holds_setpoints({**held, "extra": 1.0}, held)
    assert not holds_setpoints({"velocity": 505.0}, held)
    assert not holds_setpoints({}, held)
    assert holds_setpoints({}, {})
