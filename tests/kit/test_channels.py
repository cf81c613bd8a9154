"""autotune.kit.channels: the laws against their closed forms, and the map's limits in both units."""

from __future__ import annotations

import dataclasses
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from autotune.kit.channels import (
    ChannelInfo,
    ChannelMap,
    LinearLaw,
    StarkLaw,
    channel_map_from_table,
    identity_channel_map,
)
from autotune.errors import ConfigError, OutOfRange

# The demo scenario's Stark constants (docs/physics.md sections 4 and 6, configs/sim-rig.toml):
# k = -250 kHz per (V/cm)^2 = -25 Hz per (V/m)^2, bias field 1.5 V/cm = 150 V/m, gap 2 cm.
K = -25.0
BIAS = 150.0
GAP = 0.02
STARK = StarkLaw(K, BIAS, GAP, "positive")


def _detuning(volts: float) -> float:
    """The Stark law written out: detuning = k ((V / gap)^2 - E_bias^2) (docs/physics.md section 4)."""
    return K * ((volts / GAP) ** 2 - BIAS**2)


def test_stark_coefficient_unit_conversion():
    """-250 kHz per (V/cm)^2 is -25 Hz per (V/m)^2, since 1 V/cm = 100 V/m (docs/physics.md section 4)."""
    # No bias, 1 m gap: 100 V gives 100 V/m = 1 V/cm and so -250 kHz.
    assert StarkLaw(K, 0.0, 1.0).to_setpoint(100.0) == pytest.approx(-250e3)


def test_stark_law_worked_values():
    """Hand-worked values of k (E^2 - E_bias^2): 3.0 V gives 0 Hz, 3.2 V gives -77.5 kHz, 2.8 V gives +72.5 kHz."""
    # 3.2 V / 0.02 m = 160 V/m: -25 * (25600 - 22500) = -77500 Hz; 2.8 V: 140 V/m: -25 * (19600 - 22500) = +72500 Hz.
    assert STARK.to_setpoint(3.0) == 0.0
    assert STARK.to_setpoint(3.2) == pytest.approx(-77500.0, rel=1e-12)
    assert STARK.to_setpoint(2.8) == pytest.approx(72500.0, rel=1e-12)
    assert STARK.to_channel(-77500.0) == pytest.approx(3.2, rel=1e-12)
    assert STARK.to_channel(72500.0) == pytest.approx(2.8, rel=1e-12)


def test_stark_branch_is_the_sign_of_the_voltage():
    """The negative branch returns minus the positive branch's voltage; both give the same detuning."""
    negative = StarkLaw(K, BIAS, GAP, "negative")
    for detuning in (-100e3, 0.0, 50e3):
        volts = STARK.to_channel(detuning)
        assert volts > 0 and negative.to_channel(detuning) == -volts
        assert negative.to_setpoint(-volts) == pytest.approx(detuning, abs=1e-6)


def test_stark_law_in_millivolts_and_kilovolts():
    """A channel in mV or kV gives the detuning of the same voltage in V."""
    assert StarkLaw(K, BIAS, GAP, volts_per_unit=1e-3).to_setpoint(3200.0) == pytest.approx(-77500.0)
    assert StarkLaw(K, BIAS, GAP, volts_per_unit=1e3).to_channel(-77500.0) == pytest.approx(3.2e-3)


def test_stark_detuning_beyond_zero_field_is_refused():
    """With k < 0 the law's largest detuning is -k E_bias^2 = 562.5 kHz (at E = 0); beyond it there is no voltage."""
    assert STARK.reach_limit == pytest.approx(562.5e3)
    assert STARK.to_channel(562.5e3) == 0.0
    with pytest.raises(ValueError, match="beyond the Stark law's reach"):
        STARK.to_channel(563e3)


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=-1e6, max_value=562e3))
def test_stark_round_trip_from_detuning(detuning: float):
    """to_setpoint(to_channel(d)) returns d to 1e-9 of the law's scale (closed-form inverse)."""
    assert STARK.to_setpoint(STARK.to_channel(detuning)) == pytest.approx(detuning, abs=1e-9 * 562.5e3)


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=0.0, max_value=20.0))
def test_stark_round_trip_from_voltage(volts: float):
    """to_channel(to_setpoint(V)) returns V on the positive branch, and matches the written-out law."""
    assert STARK.to_setpoint(volts) == pytest.approx(_detuning(volts), rel=1e-12, abs=1e-9)
    assert STARK.to_channel(STARK.to_setpoint(volts)) == pytest.approx(volts, rel=1e-9, abs=1e-6)


def test_stark_smallest_slope_is_the_derivative_at_the_lowest_voltage():
    """2 |k| V / gap^2 at the end nearest 0 V matches a central difference of the law (calculus)."""
    low, high, h = 2.6, 3.4, 1e-6
    numerical = abs(_detuning(low + h) - _detuning(low - h)) / (2 * h)
    assert STARK.smallest_slope(low, high) == pytest.approx(numerical, rel=1e-6)
    assert StarkLaw(K, BIAS, GAP, "negative").smallest_slope(-3.4, -2.6) == pytest.approx(numerical, rel=1e-6)


@settings(max_examples=100, deadline=None)
@given(st.floats(min_value=-50.0, max_value=50.0).filter(lambda x: abs(x) > 1e-3),
       st.floats(min_value=-1e3, max_value=1e3), st.floats(min_value=-1e3, max_value=1e3))
def test_linear_round_trip(scale: float, offset: float, channel: float):
    """setpoint = scale * channel + offset and its inverse return each other's input."""
    law = LinearLaw(scale, offset)
    setpoint = law.to_setpoint(channel)
    assert setpoint == pytest.approx(scale * channel + offset)
    assert law.to_channel(setpoint) == pytest.approx(channel, rel=1e-9, abs=1e-9)


def test_linear_law_refuses_zero_scale():
    """A zero scale has no inverse and is refused."""
    with pytest.raises(ValueError, match="scale"):
        LinearLaw(0.0)


# --------------------------------------------------------------------------- the map

DRIVER = {
    "STARK:HV1": ChannelInfo("V", 0.0, 5.0, 0.1, 3.0),
    "VSEL:AOM_MHZ": ChannelInfo("MHz", 90.0, 140.0, 2.0, 111.0),
    "velocity": ChannelInfo("m/s", 300.0, 700.0, 40.0, 500.0),
    "detuning": ChannelInfo("Hz", -150e3, 150e3, 20e3, 0.0),
}


def _stark_table(**changes: object) -> dict:
    table = {"unit": "Hz", "channel": "STARK:HV1", "channel_unit": "V", "law": "stark",
             "coefficient_hz_m2_per_v2": K, "bias_field_v_per_m": BIAS, "electrode_gap_m": GAP,
             "branch": "positive", "limit_min": -120e3, "limit_max": 120e3, "channel_limit_min": 2.5,
             "channel_limit_max": 3.5, "channel_max_step": 0.05, "channel_safe": 3.0}
    table.update(changes)
    return {key: value for key, value in table.items() if value is not None}


def _aom_table(**changes: object) -> dict:
    table = {"unit": "m/s", "channel": "VSEL:AOM_MHZ", "channel_unit": "MHz", "law": "linear",
             "scale": 4.49, "offset": 0.0, "limit_min": 420.0, "limit_max": 600.0, "safe": 500.0}
    table.update(changes)
    return {key: value for key, value in table.items() if value is not None}


def _map(**tables: dict):
    return channel_map_from_table(tables or {"detuning": _stark_table(), "velocity": _aom_table()}, DRIVER,
                                  file="DRIVER.toml")


def test_limits_in_both_units_intersect():
    """Hz limits +-120 kHz inside the image of 2.5-3.5 V win; the channel range is their preimage."""
    mapped = _map()["detuning"]
    assert (mapped.min, mapped.max) == (-120e3, 120e3)
    # Preimage: V = gap * sqrt(E_bias^2 + d / k): 2.661 V at +120 kHz, 3.305 V at -120 kHz.
    assert mapped.channel_min == pytest.approx(GAP * math.sqrt(BIAS**2 + 120e3 / K))
    assert mapped.channel_max == pytest.approx(GAP * math.sqrt(BIAS**2 - 120e3 / K))


def test_channel_limits_tighter_than_setpoint_limits_win():
    """With 2.9-3.1 V declared, the described detuning range is the law's image of it."""
    mapped = _map(detuning=_stark_table(channel_limit_min=2.9, channel_limit_max=3.1))["detuning"]
    assert mapped.min == pytest.approx(_detuning(3.1))
    assert mapped.max == pytest.approx(_detuning(2.9))


def test_driver_limits_hold_too():
    """The driver's own channel range (90-140 MHz) bounds a wider declared velocity range (4.49 m/s per MHz)."""
    mapped = _map(velocity=_aom_table(limit_min=None, limit_max=None))["velocity"]
    assert (mapped.min, mapped.max) == (pytest.approx(90 * 4.49), pytest.approx(140 * 4.49))


def test_described_step_is_the_channel_step_times_the_smallest_slope():
    """0.05 V at the lowest voltage of the range (slope 2 |k| V / gap^2) bounds the detuning step."""
    mapped = _map()["detuning"]
    assert mapped.max_step == pytest.approx(0.05 * 2 * abs(K) * mapped.channel_min / GAP**2)
    tighter = _map(detuning=_stark_table(max_step=5e3))["detuning"]
    assert tighter.max_step == 5e3


def test_linear_step_from_the_driver():
    """Without a declared step, the driver's 2 MHz times 4.49 m/s per MHz is the velocity step."""
    assert _map()["velocity"].max_step == pytest.approx(2.0 * 4.49)


def test_safe_value_in_either_unit():
    """channel_safe 3.0 V is detuning 0; safe 500 m/s is 500 / 4.49 MHz."""
    table = _map()
    assert table["detuning"].safe == 0.0 and table["detuning"].channel_safe == 3.0
    assert table["velocity"].channel_safe == pytest.approx(500.0 / 4.49)
    assert table.safe_channels() == {"STARK:HV1": 3.0, "VSEL:AOM_MHZ": pytest.approx(500.0 / 4.49)}


def test_identity_map_reproduces_the_drivers_limits_exactly():
    """Channels named like the set-points map unchanged, limits and safe values bit for bit."""
    mapped = identity_channel_map(DRIVER)
    assert mapped.describe_setpoints() == {
        "velocity": {"unit": "m/s", "min": 300.0, "max": 700.0, "max_step": 40.0},
        "detuning": {"unit": "Hz", "min": -150e3, "max": 150e3, "max_step": 20e3},
    }
    assert mapped.safe_setpoints() == {"velocity": 500.0, "detuning": 0.0}


@pytest.mark.parametrize(("table", "key", "fragment"), [
    ({"detuning": _stark_table(wobble=1)}, "setpoints.detuning.wobble",
     "one of the keys ['bias_field_v_per_m', 'branch', 'channel'"),
    ({"detuning": _stark_table(channel="STARK:HV9")}, "setpoints.detuning.channel", "STARK:HV1"),
    ({"detuning": _stark_table(channel_unit="kV")}, "setpoints.detuning.channel_unit", "'V'"),
    ({"detuning": _stark_table(unit="kHz")}, "setpoints.detuning.unit", "'Hz'"),
    ({"detuning": _stark_table(branch="both")}, "setpoints.detuning.branch", "positive"),
    ({"detuning": _stark_table(safe=0.0)}, "setpoints.detuning.safe", "not both"),
    ({"detuning": _stark_table(channel_safe=3.4)}, "setpoints.detuning.channel_safe", "effective channel limits"),
    ({"detuning": _stark_table(limit_min=200e3, limit_max=300e3)}, "setpoints.detuning.limit_min", "overlapping"),
    ({"velocity": _aom_table(law="stark")}, "setpoints.velocity.law", "only for a detuning"),
    ({"velocity": _aom_table(scale=0.0)}, "setpoints.velocity.scale", "non-zero"),
    ({"laser": _aom_table()}, "setpoints.laser", "velocity, detuning"),
    ({"velocity": _aom_table(), "detuning": _stark_table(channel="VSEL:AOM_MHZ")},
     "setpoints.detuning.channel", "not already mapped"),
    ({"detuning": _stark_table(channel="VSEL:AOM_MHZ", channel_unit="MHz")},
     "setpoints.detuning.channel_unit", "a voltage unit for the stark law"),
    ({"detuning": _stark_table(limit_max=-130e3)}, "setpoints.detuning.limit_max", ">= limit_min"),
    ({"detuning": _stark_table(electrode_gap_m=0.0)}, "setpoints.detuning.electrode_gap_m", "> 0"),
    ({"detuning": _stark_table(law=None)}, "setpoints.detuning.law", "'linear' or 'stark'"),
])
def test_bad_declarations_name_the_key(table: dict, key: str, fragment: str):
    """Every wrong declaration is a ConfigError naming file, key and what was expected."""
    with pytest.raises(ConfigError) as info:
        channel_map_from_table(table, DRIVER, file="DRIVER.toml")
    assert info.value.file == "DRIVER.toml" and info.value.key == key
    assert fragment in str(info.value)


def test_map_without_any_limit_is_refused():
    """A linear channel with no limits anywhere cannot give described limits."""
    driver = {"AOM": ChannelInfo("MHz", max_step=1.0, safe=100.0)}
    table = {"velocity": {"unit": "m/s", "channel": "AOM", "channel_unit": "MHz", "law": "linear", "scale": 4.49}}
    with pytest.raises(ConfigError, match="finite limits"):
        channel_map_from_table(table, driver)


def test_map_without_any_step_is_refused():
    """A channel with no step limit anywhere is refused (every change must be bounded, docs/physics.md section 7)."""
    driver = {"AOM": ChannelInfo("MHz", 90.0, 140.0, safe=100.0)}
    table = {"velocity": {"unit": "m/s", "channel": "AOM", "channel_unit": "MHz", "law": "linear", "scale": 4.49}}
    with pytest.raises(ConfigError, match="largest step"):
        channel_map_from_table(table, driver)


def test_channel_step_with_a_range_reaching_zero_volts_is_refused():
    """Where the Stark law is flat (0 V) a channel step bounds no detuning step: refused, not zero."""
    with pytest.raises(ConfigError, match="not flat"):
        _map(detuning=_stark_table(channel_limit_min=0.0, limit_min=None, limit_max=None))


# --------------------------------------------------------------------------- checks at apply


def _in_force(table, **setpoints: float):
    setpoints = {**table.safe_setpoints(), **setpoints}
    commanded = {name: (value, table[name].channel_for(value)) for name, value in setpoints.items()}
    readbacks = {table[name].channel: channel for name, (_, channel) in commanded.items()}
    return table.in_force(readbacks, commanded)


def test_plan_apply_returns_the_closed_form_channel_values():
    """A detuning of -77.5 kHz is sent as 3.2 V, a velocity of 503 m/s as 503 / 4.49 MHz."""
    table = _map()
    here = _in_force(table, detuning=-70e3, velocity=500.0)
    channels = table.plan_apply({"detuning": -77.5e3, "velocity": 503.0}, here)
    assert channels == {"STARK:HV1": pytest.approx(3.2, rel=1e-12), "VSEL:AOM_MHZ": pytest.approx(503.0 / 4.49)}


@pytest.mark.parametrize(("request_", "fragment"), [
    ({"detuning": 121e3}, r"detuning: expected a value within \[min -120000, max 120000\] Hz, got 121000"),
    ({"detuning": -10e3}, "max_step"),
    ({"velocity": 510.0}, "max_step 8.98 m/s"),
    ({"laser": 1.0}, "laser: expected a set-point name"),
])
def test_plan_apply_refuses_naming_setpoint_limit_and_value(request_: dict, fragment: str):
    """Out of range, too large a step and unknown names are OutOfRange with the set-point, limit and value."""
    table = _map()
    here = _in_force(table, detuning=10e3, velocity=500.0)
    with pytest.raises(OutOfRange, match=fragment):
        table.plan_apply(request_, here)


def test_channel_step_is_checked_in_the_channel_unit():
    """With only the channel bound left, a step beyond channel_max_step in V is refused naming the channel."""
    mapped = dataclasses.replace(_map()["detuning"], max_step=1e9)
    table = ChannelMap({"detuning": mapped})
    volts = STARK.to_channel(-100e3)
    here = table.in_force({"STARK:HV1": volts}, {"detuning": (-100e3, volts)})
    table.plan_apply({"detuning": STARK.to_setpoint(volts - 0.05)}, here)
    with pytest.raises(OutOfRange, match="channel STARK:HV1 of at most channel_max_step 0.05 V"):
        table.plan_apply({"detuning": -40e3}, here)


def test_exact_max_step_is_accepted():
    """A step of exactly max_step passes (the protocol's STEP_TOLERANCE slack)."""
    table = _map()
    here = _in_force(table, velocity=500.0)
    table.plan_apply({"velocity": 500.0 + table["velocity"].max_step}, here)


def test_readback_within_tolerance_reports_the_commanded_setpoint():
    """A supply read back 1 mV off (tolerance 2 mV) still reports the commanded detuning exactly."""
    table = _map(detuning=_stark_table(channel_readback_tolerance=0.002))
    commanded = {"detuning": (-77.5e3, 3.2)}
    assert table.in_force({"STARK:HV1": 3.201}, commanded)["detuning"].setpoint == -77.5e3
    moved = table.in_force({"STARK:HV1": 3.25}, commanded)["detuning"]
    assert not moved.as_commanded and moved.setpoint == pytest.approx(_detuning(3.25))
