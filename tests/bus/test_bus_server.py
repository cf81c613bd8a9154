"""The server's request handler in-process, serving the simulated rig's driver: error kinds,
replay cache, fault table."""

from __future__ import annotations

import json

import pytest
from rig_process import SEED, SIM_CONFIG

from autotune.wire import protocol
from autotune.errors import ConfigError
from autotune.wire.protocol import Op
from autotune.kit.served import ServedDriver
from autotune.kit.server import FaultConfig, RigServer
from drivers_sim.config import load_sim_config
from drivers_sim.driver import SimulatedDriver
from drivers_sim.rig import SimulatedRig


@pytest.fixture
def rig() -> SimulatedRig:
    """A real simulated rig."""
    return SimulatedRig(load_sim_config(SIM_CONFIG), SEED)


@pytest.fixture
def server(rig):
    """A server around it, never bound (only its handler is used)."""
    server = RigServer(ServedDriver(SimulatedDriver(rig)), "tcp://127.0.0.1:0", faults=FaultConfig(),
                       cache_size=2)
    yield server
    server.close()


def _ask(server: RigServer, op: Op, args: dict, msg_id: str | None = None) -> dict:
    return json.loads(server.handle(protocol.encode_request(op, args, msg_id or protocol.new_msg_id())))


def test_repeated_msg_id_gets_the_same_bytes_and_runs_once(server, rig):
    """The same request twice gets identical reply bytes and its shots are counted once."""
    request = protocol.encode_request(Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 25}, "ab" * 16)
    first, second = server.handle(request), server.handle(request)
    assert first == second
    assert rig.status()["shots_total"] == 25


def test_reused_msg_id_with_another_request_is_refused(server, rig):
    """A msg_id reused for a different request is a bad_request and nothing runs."""
    server.handle(protocol.encode_request(Op.STATUS, {}, "cd" * 16))
    reply = _ask(server, Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 25}, "cd" * 16)
    assert reply["error"]["kind"] == "bad_request" and "msg_id" in reply["error"]["detail"]
    assert rig.status()["shots_total"] == 0


def test_a_resumed_client_resending_under_its_own_identity_gets_the_kept_reply(server, rig):
    """The same op and arguments under the same msg_id from another ``client`` (a run resumed in
    a new process resends its predecessor's unanswered request) is a repeat, answered from the
    cache and counted once (protocol.py, Idempotency): the client key names the sender, not the
    request."""
    args = {"field": "empty", "ramsey_phase": 0.0, "shots": 25}
    first = server.handle(protocol.encode_request(Op.ACQUIRE, args, "ab" * 16, client="run pid 1"))
    again = server.handle(protocol.encode_request(Op.ACQUIRE, args, "ab" * 16, client="run pid 2"))
    assert json.loads(again) == json.loads(first) and json.loads(first)["ok"]
    assert rig.status()["shots_total"] == 25


def test_replay_cache_is_bounded(server, rig):
    """With a cache of 2, a request older than two others is executed again when repeated."""
    request = protocol.encode_request(Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 10}, "ef" * 16)
    server.handle(request)
    _ask(server, Op.STATUS, {})
    _ask(server, Op.STATUS, {})
    server.handle(request)
    assert rig.status()["shots_total"] == 20


def test_interlock_maps_to_interlock(server, rig):
    """A rig interlock comes back as error kind interlock (the README's wire protocol)."""
    rig.set_interlock("cryostat above 1 K")
    reply = _ask(server, Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 10})
    assert reply["error"]["kind"] == "interlock" and "cryostat above 1 K" in reply["error"]["detail"]


def test_unknown_setpoint_name_is_out_of_range(server):
    """A set-point the rig does not have is refused by the rig as a set-point error."""
    reply = _ask(server, Op.APPLY, {"setpoints": {"laser_power": 1.0}})
    assert reply["error"]["kind"] == "out_of_range" and "laser_power" in reply["error"]["detail"]


def test_rig_request_error_maps_to_bad_request(server, rig):
    """Shots beyond the rig's own maximum (a value it cannot take) come back as bad_request."""
    too_many = load_sim_config(SIM_CONFIG).rig.max_shots_per_acquisition + 1
    reply = _ask(server, Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": too_many})
    assert reply["error"]["kind"] == "bad_request"
    assert rig.status()["shots_total"] == 0


def test_unexpected_rig_failure_maps_to_internal(server, rig, monkeypatch):
    """Any other exception of the rig comes back as internal, and the server keeps answering."""
    def broken() -> dict:
        raise ZeroDivisionError("broken clock")

    monkeypatch.setattr(rig, "status", broken)
    reply = _ask(server, Op.STATUS, {})
    assert reply["error"] == {"kind": "internal", "detail": "ZeroDivisionError: broken clock"}
    assert _ask(server, Op.DESCRIBE, {})["ok"] is True


def test_an_internal_reply_of_a_failed_request_is_not_kept(server, rig, monkeypatch):
    """A driver failing once in acquire: its internal reply is not kept, so the same request
    (same msg_id) sent again runs and is counted once (protocol.py, Idempotency)."""
    good, calls = rig.acquire, []

    def fails_once(*args: object, **kwargs: object) -> dict:
        calls.append(args)
        if len(calls) == 1:
            raise RuntimeError("trigger lost")
        return good(*args, **kwargs)

    monkeypatch.setattr(rig, "acquire", fails_once)
    request = protocol.encode_request(Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 25},
                                      "a1" * 16)
    assert json.loads(server.handle(request))["error"]["kind"] == "internal"
    retried = server.handle(request)
    assert json.loads(retried)["ok"] is True
    assert server.handle(request) == retried  # the result is kept: never run a third time
    assert len(calls) == 2 and rig.status()["shots_total"] == 25


def test_an_internal_reply_of_a_request_that_ran_is_kept(server, rig, monkeypatch):
    """The acquisition ran but its read-back failed: the internal reply is kept, the same
    request sent again gets it back and the rig acquires once (never twice)."""
    good_status, acquired = rig.status, []
    good_acquire = rig.acquire

    def acquire(*args: object, **kwargs: object) -> dict:
        acquired.append(args)
        return good_acquire(*args, **kwargs)

    def status_fails_after_acquiring() -> dict:
        if acquired:
            raise OSError("read-back lost")
        return good_status()

    monkeypatch.setattr(rig, "acquire", acquire)
    monkeypatch.setattr(rig, "status", status_fails_after_acquiring)
    request = protocol.encode_request(Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 25},
                                      "b2" * 16)
    first = server.handle(request)
    assert json.loads(first)["error"]["kind"] == "internal"
    assert server.handle(request) == first
    assert len(acquired) == 1


def test_fault_table_with_unknown_key_is_refused():
    """A [faults] key the server does not know is refused naming file and key."""
    with pytest.raises(ConfigError) as info:
        FaultConfig.from_table({"drop_probability": 0.1}, file="sim-rig.toml")
    assert (info.value.file, info.value.key) == ("sim-rig.toml", "faults.drop_probability")


def test_fault_table_with_bad_probability_is_refused():
    """A probability outside [0, 1] is refused naming the key, expected and got."""
    with pytest.raises(ConfigError, match=r"faults\.corrupt_reply_probability: expected a probability in \[0, 1\], got 1.5"):
        FaultConfig.from_table({"corrupt_reply_probability": 1.5}, file="sim-rig.toml")


def test_fault_flags_override_the_table():
    """Flags given replace table values; flags not given leave them."""
    faults = FaultConfig.from_table({"drop_reply_probability": 0.1, "delay_reply_s": 0.2}).overridden(
        drop_reply_probability=0.5, delay_reply_s=None)
    assert (faults.drop_reply_probability, faults.delay_reply_s) == (0.5, 0.2)


def test_every_identified_result_carries_the_servers_instance(server):
    """describe, status, apply, acquire and safe report one instance (README: rig identity)."""
    seen = {
        _ask(server, Op.DESCRIBE, {})["result"]["instance"],
        _ask(server, Op.STATUS, {})["result"]["instance"],
        _ask(server, Op.APPLY, {"setpoints": {"detuning": 1000.0}})["result"]["instance"],
        _ask(server, Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 5})["result"]["instance"],
        _ask(server, Op.SAFE, {})["result"]["instance"],
    }
    assert seen == {server.instance}
    assert protocol.parse_description(_ask(server, Op.DESCRIBE, {})["result"]).instance == server.instance


def test_two_servers_of_one_rig_report_different_instances(rig):
    """A restarted server is recognisable: its instance is drawn afresh."""
    served = ServedDriver(SimulatedDriver(rig))
    first = RigServer(served, "tcp://127.0.0.1:0", faults=FaultConfig())
    second = RigServer(served, "tcp://127.0.0.1:0", faults=FaultConfig())
    assert first.instance != second.instance
    first.close()
    second.close()


def test_describe_reports_the_rigs_shot_limit(server):
    """describe's optional max_shots_per_acquisition is the rig's own limit (configs/sim-rig.toml)."""
    reply = _ask(server, Op.DESCRIBE, {})["result"]
    assert reply["max_shots_per_acquisition"] == load_sim_config(SIM_CONFIG).rig.max_shots_per_acquisition


def test_interlock_reply_is_not_replayed(server, rig):
    """A request refused under interlock runs when sent again once it cleared: nothing was done
    the first time, so the reply is not kept (the README's idempotency rule)."""
    request = protocol.encode_request(Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 7}, "ab" * 16)
    rig.set_interlock("helium transfer")
    assert json.loads(server.handle(request))["error"]["kind"] == "interlock"
    rig.set_interlock(None)
    assert json.loads(server.handle(request))["ok"] is True
    assert json.loads(server.handle(request))["ok"] is True
    assert rig.status()["shots_total"] == 7


@pytest.mark.parametrize(("op", "args"), [
    (Op.THERMAL_STEP, {"shift_hz": 5e9}),
    (Op.THERMAL_STEP, {"shift_hz": -2e6}),
    (Op.ADVANCE, {"seconds": 1e12}),
])
def test_absurd_simulated_values_are_out_of_range(server, rig, op, args):
    """A thermal step of GHz or an advance of millennia is refused as out_of_range and changes nothing."""
    before = rig.status()["clock"]
    reply = _ask(server, op, args)
    assert reply["error"]["kind"] == "out_of_range"
    assert rig.status()["clock"] == before


def test_internal_value_error_of_the_rig_is_internal(server, rig, monkeypatch):
    """A ValueError raised inside the rig's own code is its failure (internal), not the client's."""
    def broken(*args: object) -> dict:
        raise ValueError("matrix not positive definite")

    monkeypatch.setattr(rig, "acquire", broken)
    reply = _ask(server, Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 5})
    assert reply["error"]["kind"] == "internal"
