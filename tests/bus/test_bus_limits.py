"""Set-points outside their limits, or moved by too large a step, are refused on both sides.

The limits come from the rig's own ``describe`` (and configured ones); messages must name the
set-point, the limit and the value.
"""

from __future__ import annotations

import json
import signal

import pytest
import zmq

from autotune.wire import protocol
from autotune.errors import LimitError, RigTimeout
from autotune.wire.protocol import SetpointLimit
from rig_process import spawn_server


#: The tests that read ``served`` share its server child (pytest-xdist's loadgroup runs them on
#: one worker); each reads the set-points in force and moves relative to them.
_SHARES_SERVER = pytest.mark.xdist_group("test_bus_limits")


@pytest.fixture(scope="module")
def served_server(tmp_path_factory):
    """One server child for the tests of ``served``."""
    server = spawn_server(tmp_path_factory.mktemp("limits"), "rig")
    yield server
    server.stop()


@pytest.fixture
def served(served_server, make_client):
    """The module's server child, a fresh client that has read the rig's description, and that
    description."""
    client = make_client(served_server.endpoint)
    description = client.describe()
    return served_server, client, description


@pytest.fixture
def raw_socket(served):
    """A bare REQ socket to the same server, bypassing the client's own checks."""
    context = zmq.Context()
    socket = context.socket(zmq.REQ)
    socket.setsockopt(zmq.LINGER, 0)
    socket.connect(served[0].endpoint)
    yield socket
    socket.close(linger=0)
    context.term()


def _raw_apply(socket: zmq.Socket, setpoints: dict[str, float]) -> dict:
    msg_id = protocol.new_msg_id()
    socket.send(json.dumps({"proto": 1, "msg_id": msg_id, "op": "apply", "args": {"setpoints": setpoints}}).encode())
    assert socket.poll(5000), "no reply within 5 s"
    return json.loads(socket.recv())


@_SHARES_SERVER
def test_client_refuses_value_above_the_described_maximum(served):
    """A velocity above the rig's maximum is refused locally, naming set-point, limit and value; nothing moves."""
    _, client, description = served
    limit = description.setpoints["velocity"]
    before = dict(client.status().setpoints)
    wanted = limit.max + 1.0
    with pytest.raises(LimitError) as info:
        client.apply({"velocity": wanted})
    message = str(info.value)
    assert "'velocity'" in message and repr(limit.max) in message and repr(wanted) in message
    assert dict(client.status().setpoints) == before


@_SHARES_SERVER
def test_client_refuses_a_step_larger_than_max_step(served):
    """A detuning step of 1.5 max_step inside the range is refused locally, naming max_step and value."""
    _, client, description = served
    limit = description.setpoints["detuning"]
    now = client.status().setpoints["detuning"]
    wanted = now + 1.5 * limit.max_step if now + 1.5 * limit.max_step <= limit.max else now - 1.5 * limit.max_step
    with pytest.raises(LimitError) as info:
        client.apply({"detuning": wanted})
    message = str(info.value)
    assert "max_step" in message and repr(limit.max_step) in message and repr(wanted) in message


@_SHARES_SERVER
def test_client_accepts_a_step_of_exactly_max_step(served):
    """A step of exactly max_step is allowed by the client and by the rig."""
    _, client, description = served
    limit = description.setpoints["detuning"]
    now = client.status().setpoints["detuning"]
    wanted = now + limit.max_step if now + limit.max_step <= limit.max else now - limit.max_step
    assert client.apply({"detuning": wanted}).setpoints["detuning"] == wanted


def test_configured_limits_tighter_than_the_rig_win(start_server, make_client):
    """Configured limits narrower than the rig's become the effective ones, and a step beyond them is refused."""
    server = start_server()
    configured = SetpointLimit("m/s", 480.0, 520.0, 5.0)
    client = make_client(server.endpoint, limits={"velocity": configured})
    rig_limit = client.describe().setpoints["velocity"]
    assert client.limits["velocity"] == SetpointLimit(
        "m/s", max(rig_limit.min, 480.0), min(rig_limit.max, 520.0), min(rig_limit.max_step, 5.0))
    now = client.status().setpoints["velocity"]
    with pytest.raises(LimitError, match="max_step 5.0"):
        client.apply({"velocity": now + 5.5})


def test_client_without_any_limit_refuses_to_send(start_server, make_client):
    """Before describe and with no configured limit, the client sends no set-point at all."""
    server = start_server()
    client = make_client(server.endpoint)
    with pytest.raises(LimitError, match="no limit known"):
        client.apply({"velocity": 500.0})


@_SHARES_SERVER
def test_server_refuses_value_out_of_range_with_the_limit(served, raw_socket):
    """A raw out-of-range apply gets out_of_range from the server, the detail naming the limit."""
    _, _, description = served
    limit = description.setpoints["velocity"]
    reply = _raw_apply(raw_socket, {"velocity": limit.max + 1.0})
    # Error kind of the README's wire protocol for a set-point outside its limits.
    assert reply["ok"] is False and reply["error"]["kind"] == "out_of_range"
    assert "velocity" in reply["error"]["detail"] and f"{limit.max:g}" in reply["error"]["detail"]


@_SHARES_SERVER
def test_server_refuses_too_large_step_with_the_limit(served, raw_socket):
    """A raw apply stepping 1.5 max_step gets out_of_range, the detail naming max_step."""
    _, client, description = served
    limit = description.setpoints["velocity"]
    now = client.status().setpoints["velocity"]
    target = now + 1.5 * limit.max_step if now + 1.5 * limit.max_step <= limit.max else now - 1.5 * limit.max_step
    reply = _raw_apply(raw_socket, {"velocity": target})
    assert reply["ok"] is False and reply["error"]["kind"] == "out_of_range"
    assert f"max_step {limit.max_step:g}" in reply["error"]["detail"]


def test_timed_out_apply_forgets_the_setpoints_in_force(start_server, make_client):
    """An apply whose reply never came may have moved the rig, so the client stops trusting its old values."""
    server = start_server()
    hasty = make_client(server.endpoint, timeout_s=0.3, retries=0)
    limit = hasty.describe().setpoints["velocity"]
    now = hasty.status().setpoints["velocity"]
    target = now + 0.5 * limit.max_step if now + 0.5 * limit.max_step <= limit.max else now - 0.5 * limit.max_step
    server.process.send_signal(signal.SIGSTOP)  # the rig stalls with the request on its way
    try:
        with pytest.raises(RigTimeout):
            hasty.apply({"velocity": target})
    finally:
        server.process.send_signal(signal.SIGCONT)
    assert dict(hasty.setpoints) == {}
    # The stalled rig did execute it: a step check against the old value would have been wrong.
    patient = make_client(server.endpoint, timeout_s=2.0, retries=0)
    assert patient.status().setpoints["velocity"] == target
