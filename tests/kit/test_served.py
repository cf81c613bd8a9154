"""autotune.kit.served and autotune.kit.server in process: a driver behind the protocol, through its map."""

from __future__ import annotations

import json
import math
from typing import Any

import pytest
from lab_driver.driver import ELECTRODE, LabDriver

from autotune.wire import protocol
from autotune.kit.driver_config import load_driver_config
from autotune.errors import ConfigError, RigRefused
from autotune.wire.protocol import Op
from autotune.kit.served import ServedDriver
from autotune.kit.server import FaultConfig, LocalRig, RigServer
from drivers_sim.driver import SimulatedDriver

from .conftest import EXAMPLE_DRIVER_TOML, SIM_DRIVER_TOML

K, BIAS, GAP = -25.0, 150.0, 0.02  # the Stark constants of both DRIVER.toml files (docs/physics.md section 4)


def _volts(detuning_hz: float) -> float:
    """The Stark law's inverse on the positive branch: V = gap sqrt(E_bias^2 + d / k)."""
    return GAP * math.sqrt(BIAS**2 + detuning_hz / K)


class Recorder:
    """A driver that records the calls it gets (around the example driver)."""

    def __init__(self) -> None:
        self.inner = LabDriver("supply://test", "seq://test", seed=3)
        self.applied: list[dict[str, float]] = []

    def __getattr__(self, name: str) -> Any:
        return getattr(self.inner, name)

    def apply(self, channels: dict[str, float]) -> None:
        self.applied.append(dict(channels))
        self.inner.apply(channels)


@pytest.fixture
def recorder() -> Recorder:
    """The example driver with its calls recorded."""
    return Recorder()


@pytest.fixture
def served(recorder: Recorder) -> ServedDriver:
    """The example driver behind its own DRIVER.toml's channel map."""
    return ServedDriver(recorder, load_driver_config(EXAMPLE_DRIVER_TOML).setpoints, source="DRIVER.toml")


@pytest.fixture
def server(served: ServedDriver) -> Any:
    """A never-bound server around it: its request handler only."""
    server = RigServer(served, "tcp://127.0.0.1:0", faults=FaultConfig())
    yield server
    server.close()


def _ask(server: RigServer, op: str, args: dict, msg_id: str | None = None) -> dict:
    return json.loads(server.handle(protocol.encode_request(Op(op), args, msg_id or protocol.new_msg_id())))


def test_detuning_reaches_the_electrode_as_the_closed_form_voltage(server, recorder):
    """apply detuning -12 kHz sends V = gap sqrt(E_bias^2 + d/k) to STARK:HV1 (docs/physics.md section 4)."""
    reply = _ask(server, "apply", {"setpoints": {"detuning": -12e3}})
    assert reply["ok"], reply
    assert recorder.applied == [{ELECTRODE: pytest.approx(_volts(-12e3), rel=1e-12)}]
    # The supply reads back to 1 mV; within the 2 mV tolerance the commanded value is reported.
    assert reply["result"]["setpoints"]["detuning"] == -12e3


def test_readback_off_the_command_is_reported_through_the_law(server, recorder):
    """If someone turns the supply to 3.1 V, status reports k ((3.1/gap)^2 - E_bias^2), not the command."""
    _ask(server, "apply", {"setpoints": {"detuning": -12e3}})
    recorder.inner.supply.set_voltage("HV1", 3.1)
    status = _ask(server, "status", {})["result"]
    assert status["setpoints"]["detuning"] == pytest.approx(K * ((3.1 / GAP) ** 2 - BIAS**2))


def test_describe_reports_the_map_in_setpoint_units(server):
    """describe gives the effective limits (Hz limits and the 15 kHz step), the driver's rate and an instance."""
    result = _ask(server, "describe", {})["result"]
    assert result["setpoints"]["detuning"] == {"unit": "Hz", "min": -120e3, "max": 120e3, "max_step": 15e3}
    assert result["setpoints"]["velocity"]["max_step"] == pytest.approx(2.0 * 4.49)
    assert result["safe_setpoints"]["detuning"] == 0.0
    assert result["simulated"] is False and result["repetition_rate_hz"] == 150.0
    assert result["instance"] == server.instance


@pytest.mark.parametrize("setpoints", [{"detuning": 130e3}, {"detuning": 16e3}, {"velocity": 1000.0},
                                       {"laser": 1.0}])
def test_refused_setpoints_never_reach_the_driver(server, recorder, setpoints):
    """Out of range, too large a step or an unknown name: out_of_range, and the driver's apply is not called."""
    reply = _ask(server, "apply", {"setpoints": setpoints})
    assert reply["error"]["kind"] == "out_of_range"
    assert next(iter(setpoints)) in reply["error"]["detail"]
    assert recorder.applied == []


def test_interlock_is_refused_before_the_driver_and_not_replayed(server, recorder):
    """Under an open interlock apply is answered interlock without a driver call; resent once it closed, it runs."""
    request = protocol.encode_request(Op.APPLY, {"setpoints": {"detuning": 5e3}}, "ab" * 16)
    recorder.inner.supply.open_interlock("door open")
    reply = json.loads(server.handle(request))
    assert reply["error"]["kind"] == "interlock" and "door open" in reply["error"]["detail"]
    assert recorder.applied == []
    recorder.inner.supply.close_interlock()
    assert json.loads(server.handle(request))["ok"] is True
    assert len(recorder.applied) == 1


def test_busy_rig_is_answered_busy_and_not_replayed(server, recorder):
    """While the sequencer is busy acquire is answered busy; resent once free, it runs and counts its shots."""
    request = protocol.encode_request(Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 30}, "cd" * 16)
    recorder.inner.sequencer.busy_with = "a manual scan"
    assert json.loads(server.handle(request))["error"]["kind"] == "busy"
    recorder.inner.sequencer.busy_with = None
    first, second = server.handle(request), server.handle(request)
    assert first == second and json.loads(first)["ok"] is True
    assert recorder.inner.sequencer.shots_done() == 30


def test_driver_refusal_becomes_its_kind(server, recorder, monkeypatch):
    """A driver's own OutOfRange (the supply's range) is answered out_of_range with its message."""
    def refuse(channels: dict) -> None:
        from autotune.kit.driver import OutOfRange
        raise OutOfRange("STARK:HV1: the supply says no")

    monkeypatch.setattr(recorder.inner, "apply", refuse)
    reply = _ask(server, "apply", {"setpoints": {"detuning": 5e3}})
    assert reply["error"] == {"kind": "out_of_range", "detail": "STARK:HV1: the supply says no"}


def test_other_driver_exceptions_are_internal_and_the_server_goes_on(server, recorder, monkeypatch):
    """An exception outside the vocabulary is internal; the next request is answered normally."""
    def broken(*args: object) -> dict:
        raise ConnectionResetError("sequencer link lost")

    monkeypatch.setattr(recorder.inner, "acquire", broken)
    reply = _ask(server, "acquire", {"field": "empty", "ramsey_phase": 0.0, "shots": 5})
    assert reply["error"] == {"kind": "internal", "detail": "ConnectionResetError: sequencer link lost"}
    assert _ask(server, "status", {})["ok"] is True


def test_malformed_driver_result_is_internal_naming_the_key(server, recorder, monkeypatch):
    """A status without the clock is the driver's failure: internal, naming driver.status() and 'clock'."""
    good = recorder.inner.status

    def no_clock() -> dict:
        result = good()
        del result["clock"]
        return result

    monkeypatch.setattr(recorder.inner, "status", no_clock)
    reply = _ask(server, "status", {})
    assert reply["error"]["kind"] == "internal" and "driver.status(): missing key 'clock'" in reply["error"]["detail"]


def test_shots_above_the_drivers_maximum_are_bad_request(server, recorder):
    """More shots than the driver's max_shots_per_acquisition (60000) are refused before the driver runs."""
    reply = _ask(server, "acquire", {"field": "empty", "ramsey_phase": 0.0, "shots": 60_001})
    assert reply["error"]["kind"] == "bad_request" and "60000" in reply["error"]["detail"]
    assert recorder.inner.sequencer.shots_done() == 0


def test_simulated_ops_are_unknown_for_a_real_driver(server):
    """truth, advance and thermal_step are answered unknown_op when the driver lacks them (protocol text)."""
    for op, args in (("truth", {}), ("advance", {"seconds": 1.0}), ("thermal_step", {"shift_hz": 1.0})):
        assert _ask(server, op, args)["error"]["kind"] == "unknown_op"


def test_safe_sends_the_maps_safe_channels(server, recorder):
    """safe moves HV1 to channel_safe 3.0 V and the AOM to 500 / 4.49 MHz, with no step limit."""
    recorder.inner.supply.set_voltage("HV1", 3.2)
    result = _ask(server, "safe", {})["result"]
    assert result["setpoints"] == {"velocity": 500.0, "detuning": 0.0}
    assert recorder.inner.supply.read_voltage("HV1") == pytest.approx(3.0)
    assert recorder.inner.sequencer.read_register("AOM_VSEL") == pytest.approx(500.0 / 4.49)


def test_driver_lacking_a_mapped_readback_is_refused_at_start():
    """A status without the read-back of a mapped channel stops the start with a ConfigError."""
    driver = Recorder()
    good = driver.inner.status
    driver.inner.status = lambda: {**good(), "channels": {}}
    with pytest.raises(ConfigError, match="read-back of mapped channel"):
        ServedDriver(driver, load_driver_config(EXAMPLE_DRIVER_TOML).setpoints)


@pytest.mark.parametrize(("change", "named"), [
    ({"interlock": ""}, "driver.status().interlock: expected None or a non-empty string, got ''"),
    ({"busy": "no"}, "driver.status().busy: expected true or false, got 'no'"),
])
def test_a_malformed_first_status_is_refused_naming_its_own_key(change, named):
    """A first status wrong in another key than the read-backs is refused naming that key, and
    the message does not send the engineer looking for a missing read-back (autotune.driver's
    contract: interlock is None or a string saying which interlock is set, busy a bool)."""
    driver = Recorder()
    good = driver.inner.status
    driver.inner.status = lambda: {**good(), **change}
    with pytest.raises(ConfigError) as caught:
        ServedDriver(driver, load_driver_config(EXAMPLE_DRIVER_TOML).setpoints)
    assert named in str(caught.value)
    assert "expected a status with every mapped channel's read-back" not in str(caught.value)


def test_simulated_rig_through_the_stark_map_gets_the_closed_form_voltage():
    """Served through configs/sim-driver.toml, a detuning reaches the simulated electrodes as
    V = gap sqrt(E_bias^2 + d / k) (the simulated rig's own truth reports the voltage)."""
    config = load_driver_config(SIM_DRIVER_TOML)
    driver = SimulatedDriver.from_config(config.options, SIM_DRIVER_TOML.parent)
    rig = LocalRig(driver, config.setpoints)
    description = rig.describe()
    assert description.setpoints["detuning"].max_step == pytest.approx(0.05 * 2 * abs(K) * _volts(150e3) / GAP**2)
    rig.apply({"detuning": -15e3})
    hidden = rig.truth()["hidden"]
    assert hidden["electrode_voltage_v"] == pytest.approx(_volts(-15e3), rel=1e-12)
    assert rig.status().setpoints["detuning"] == -15e3
    with pytest.raises(RigRefused, match="out_of_range"):
        rig.apply({"detuning": 10e3})


def test_identity_served_simulated_rig_describes_as_before():
    """Served unchanged (autotune rig), the simulated rig describes its own limits (configs/sim-rig.toml)."""
    rig = LocalRig(SimulatedDriver.from_file(SIM_DRIVER_TOML.parent / "sim-rig.toml", seed=1))
    description = rig.describe()
    assert description.setpoints["velocity"] == protocol.SetpointLimit("m/s", 300.0, 700.0, 40.0)
    assert description.setpoints["detuning"] == protocol.SetpointLimit("Hz", -150e3, 150e3, 20e3)
    assert dict(description.safe_setpoints) == {"velocity": 500.0, "detuning": 0.0}
    assert description.max_shots_per_acquisition == 100_000 and description.simulated
