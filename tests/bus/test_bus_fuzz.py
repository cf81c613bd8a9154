"""Fuzzing of both sides of the wire boundary (in-process, no sockets).

Whatever bytes or JSON arrive, the server side produces a well-formed reply and the client
side raises nothing but ProtocolError or RigRefused.
"""

from __future__ import annotations

import json
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from rig_process import SEED, SIM_CONFIG

from autotune.wire import protocol
from autotune.errors import ProtocolError, RigRefused
from autotune.wire.protocol import ErrorKind, Op, RequestRejected

MSG_ID = "fedcba9876543210fedcba9876543210"
FUZZ = settings(max_examples=300, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=20),
    lambda children: st.lists(children, max_size=5) | st.dictionaries(st.text(max_size=10), children, max_size=5),
    max_leaves=25,
)
# Near-valid requests reach the per-op validators (and, on the server, the rig) far more often.
op_names = st.sampled_from([op.value for op in Op]) | st.text(max_size=12)
setpoint_values = st.dictionaries(st.sampled_from(["velocity", "detuning", "", "x"]),
                                  st.floats(-1e6, 1e6) | st.integers(-10**6, 10**6) | json_values, max_size=3)
arguments = st.fixed_dictionaries({}, optional={
    "setpoints": setpoint_values | json_values,
    "field": st.sampled_from(["empty", "one_photon", "two"]) | json_values,
    "ramsey_phase": st.floats(-10, 10) | json_values,
    "shots": st.integers(-3, 300) | json_values,
    "seconds": st.floats(-1, 100) | json_values,
    "shift_hz": st.floats(-1e5, 1e5) | json_values,
}) | json_values
near_requests = st.fixed_dictionaries(
    {"proto": st.just(1) | json_values, "msg_id": st.just(MSG_ID) | json_values, "op": op_names, "args": arguments},
    optional={"extra": json_values},
).map(lambda message: json.dumps(message).encode())
any_frames = st.binary(max_size=300) | json_values.map(lambda value: json.dumps(value).encode()) | near_requests


def _check_error_reply(data: bytes, kind: ErrorKind) -> None:
    """An encoded error reply decodes on the client side to RigRefused of the same kind."""
    reply = protocol.encode_error(MSG_ID, kind, "detail")
    with pytest.raises(RigRefused) as info:
        protocol.decode_reply(reply, MSG_ID)
    assert info.value.kind == kind.value


@FUZZ
@given(any_frames)
def test_request_decoder_raises_only_request_rejected(data: bytes):
    """decode_request either returns a Request of a known op or raises RequestRejected with a known kind."""
    try:
        request = protocol.decode_request(data)
    except RequestRejected as exc:
        assert isinstance(exc.kind, ErrorKind) and exc.detail
        _check_error_reply(data, exc.kind)
    else:
        assert isinstance(request.op, Op)


@FUZZ
@given(st.binary(max_size=300) | json_values.map(lambda value: json.dumps(value).encode()))
def test_reply_decoder_raises_only_protocol_errors(data: bytes):
    """decode_reply of arbitrary bytes or JSON raises ProtocolError or RigRefused, or returns an object."""
    try:
        result = protocol.decode_reply(data, MSG_ID)
    except (ProtocolError, RigRefused):
        return
    assert isinstance(result, dict)


@settings(FUZZ, max_examples=150)
@given(st.sampled_from([protocol.parse_description, protocol.parse_applied, protocol.parse_acquisition,
                        protocol.parse_status, protocol.parse_safe, protocol.parse_truth,
                        protocol.parse_advance, protocol.parse_thermal_step]),
       st.dictionaries(st.sampled_from(["clock", "setpoints", "counts", "shots", "t_start", "t_end", "busy",
                                        "interlock", "shots_total", "rig", "proto", "simulated", "fields",
                                        "repetition_rate_hz", "safe_setpoints", "cavity_offset_hz"]),
                       json_values, max_size=16))
def test_result_parsers_raise_only_protocol_errors(parser: Any, result: dict[str, Any]):
    """Every result parser turns an arbitrary object into its typed result or a ProtocolError."""
    try:
        parser(result)
    except ProtocolError:
        pass




@pytest.fixture(scope="module")
def in_process_server():
    """A RigServer around the real simulated rig, never bound: only its request handler is used."""
    from autotune.kit.served import ServedDriver
    from autotune.kit.server import FaultConfig, RigServer
    from drivers_sim.config import load_sim_config
    from drivers_sim.driver import SimulatedDriver
    from drivers_sim.rig import SimulatedRig

    driver = SimulatedDriver(SimulatedRig(load_sim_config(SIM_CONFIG), SEED))
    server = RigServer(ServedDriver(driver), "tcp://127.0.0.1:0", faults=FaultConfig())
    yield server
    server.close()


@FUZZ
@given(data=any_frames)
def test_server_answers_every_frame_with_a_valid_reply(in_process_server: Any, data: bytes):
    """The server's handler answers any frame with a reply that our own client decoder accepts."""
    reply = in_process_server.handle(data)
    assert len(reply) <= protocol.MAX_MESSAGE_BYTES
    message = json.loads(reply)
    # Reply layout of the README's wire protocol: proto, msg_id, ok, and result or error.
    assert message["proto"] == 1 and isinstance(message["ok"], bool)
    try:
        protocol.decode_reply(reply, message["msg_id"] or MSG_ID)
    except RigRefused as exc:
        assert exc.kind in {kind.value for kind in ErrorKind}
