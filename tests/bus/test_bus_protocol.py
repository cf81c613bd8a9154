"""The protocol module on its own: strict decoding, per-op validation, typed results."""

from __future__ import annotations

import json

import pytest

from autotune.wire import protocol
from autotune.errors import ProtocolError, RigRefused
from autotune.wire.protocol import ErrorKind, Op, RequestRejected

MSG_ID = "0123456789abcdef0123456789abcdef"


def _request(**overrides: object) -> bytes:
    message = {"proto": 1, "msg_id": MSG_ID, "op": "status", "args": {}}
    message.update(overrides)
    return json.dumps(message).encode()


def _rejected(data: bytes) -> RequestRejected:
    with pytest.raises(RequestRejected) as info:
        protocol.decode_request(data)
    return info.value


def test_request_round_trip_keeps_every_argument():
    """A request built by encode_request decodes to the same op and normalised arguments."""
    data = protocol.encode_request(Op.ACQUIRE, {"field": "one_photon", "ramsey_phase": 1, "shots": 40}, MSG_ID)
    request = protocol.decode_request(data)
    # The request layout of the README's wire protocol: {"proto": 1, "msg_id", "op", "args"}.
    assert json.loads(data) == {"proto": 1, "msg_id": MSG_ID, "op": "acquire",
                                "args": {"field": "one_photon", "ramsey_phase": 1.0, "shots": 40}}
    assert (request.msg_id, request.op, dict(request.args)) == (
        MSG_ID, Op.ACQUIRE, {"field": "one_photon", "ramsey_phase": 1.0, "shots": 40})


def test_msg_ids_are_fresh_lowercase_hex():
    """Message ids are 32 lower-case hex characters and do not repeat."""
    ids = {protocol.new_msg_id() for _ in range(1000)}
    # 128 random bits: a collision among 1000 ids has probability ~1e-33 (birthday bound).
    assert len(ids) == 1000
    assert all(len(i) == 32 and set(i) <= set("0123456789abcdef") for i in ids)


@pytest.mark.parametrize("literal", [b"NaN", b"Infinity", b"-Infinity", b"1e400"])
def test_non_finite_numbers_are_bad_requests(literal: bytes):
    """NaN, infinities and numbers overflowing a double are refused (RFC 8259 section 6 has no such values)."""
    data = b'{"proto":1,"msg_id":"%s","op":"advance","args":{"seconds":%s}}' % (MSG_ID.encode(), literal)
    error = _rejected(data)
    assert error.kind is ErrorKind.BAD_REQUEST


def test_oversize_message_is_refused_with_the_limit():
    """A frame above MAX_MESSAGE_BYTES is refused and the detail states the limit and the size."""
    data = _request(args={"pad": "x" * protocol.MAX_MESSAGE_BYTES})
    error = _rejected(data)
    assert error.kind is ErrorKind.BAD_REQUEST
    assert str(protocol.MAX_MESSAGE_BYTES) in error.detail and str(len(data)) in error.detail


def test_other_protocol_version_is_unsupported():
    """A request for proto 2 gets unsupported_version, keeping its msg_id (kind from the README's wire protocol)."""
    error = _rejected(_request(proto=2))
    assert (error.kind, error.msg_id) == (ErrorKind.UNSUPPORTED_VERSION, MSG_ID)


@pytest.mark.parametrize("data", [b"[1, 2]", b'"status"', b"null", b"\xff\xfe", b"{", b'{"a": 1, "a": 2}'])
def test_non_object_or_broken_json_is_a_bad_request(data: bytes):
    """Anything but one well-formed JSON object without duplicate keys is a bad_request without msg_id."""
    error = _rejected(data)
    assert (error.kind, error.msg_id) == (ErrorKind.BAD_REQUEST, "")


def test_unknown_op_is_named():
    """An op outside the protocol gets unknown_op and the detail quotes it."""
    error = _rejected(_request(op="teleport"))
    assert error.kind is ErrorKind.UNKNOWN_OP and "'teleport'" in error.detail


def test_wrong_argument_type_names_key_expected_and_got():
    """A wrong type is reported with its key path, what was expected and what was received."""
    error = _rejected(_request(op="acquire", args={"field": "empty", "ramsey_phase": "half", "shots": 10}))
    assert error.kind is ErrorKind.BAD_REQUEST
    assert "args.ramsey_phase" in error.detail and "finite number" in error.detail and "'half'" in error.detail


def test_booleans_are_not_numbers():
    """JSON true is not accepted where a count is expected (RFC 8259 keeps booleans and numbers apart)."""
    error = _rejected(_request(op="acquire", args={"field": "empty", "ramsey_phase": 0.0, "shots": True}))
    assert "args.shots" in error.detail


def test_unknown_argument_is_refused():
    """An argument the op does not take is refused by name."""
    error = _rejected(_request(op="status", args={"verbose": 1}))
    assert error.kind is ErrorKind.BAD_REQUEST and "args.verbose: expected no keys" in error.detail


def test_bad_client_arguments_raise_protocol_error_before_sending():
    """The client side refuses to encode an invalid request (here: zero shots)."""
    with pytest.raises(ProtocolError, match="args.shots"):
        protocol.encode_request(Op.ACQUIRE, {"field": "empty", "ramsey_phase": 0.0, "shots": 0}, MSG_ID)


def test_error_reply_becomes_rig_refused():
    """An error reply is raised as RigRefused with the rig's kind and detail."""
    data = protocol.encode_error(MSG_ID, ErrorKind.INTERLOCK, "detector high voltage off")
    with pytest.raises(RigRefused) as info:
        protocol.decode_reply(data, MSG_ID)
    assert (info.value.kind, info.value.detail) == ("interlock", "detector high voltage off")


def test_reply_for_another_msg_id_is_a_protocol_error():
    """A success reply answering another msg_id is refused."""
    data = protocol.encode_result("ab" * 16, {"clock": 0.0})
    with pytest.raises(ProtocolError, match="msg_id"):
        protocol.decode_reply(data, MSG_ID)


def test_status_result_parses_to_typed_object():
    """A status result in the layout of the README's wire protocol becomes a Status with every field."""
    status = protocol.parse_status({"clock": 12.5, "busy": False, "interlock": None,
                                    "setpoints": {"velocity": 500, "detuning": -1.0e3}, "shots_total": 300})
    assert (status.clock, status.busy, status.interlock, dict(status.setpoints), status.shots_total) == (
        12.5, False, None, {"velocity": 500.0, "detuning": -1000.0}, 300)


def test_result_with_missing_key_names_it():
    """A result without a required key is a ProtocolError naming the key."""
    with pytest.raises(ProtocolError, match=r"status result\.shots_total: expected .*got 'nothing'"):
        protocol.parse_status({"clock": 1.0, "busy": False, "interlock": None, "setpoints": {}})


def test_negative_count_is_refused():
    """Counts are non-negative integers; a negative one is a ProtocolError naming counts.g."""
    result = {"counts": {"e": 0, "g": -1, "i": 0}, "shots": 10, "t_start": 0.0, "t_end": 0.1, "setpoints": {}}
    with pytest.raises(ProtocolError, match=r"counts\.g"):
        protocol.parse_acquisition(result)


def test_status_without_instance_is_still_valid():
    """A rig that does not report its identity stays valid (the key is optional, README)."""
    status = protocol.parse_status({"clock": 1.0, "busy": False, "interlock": None,
                                    "setpoints": {"velocity": 500.0}, "shots_total": 3})
    assert status.instance is None


@pytest.mark.parametrize("bad", ["", "a" * 65, "white space", 17, None])
def test_malformed_instance_is_a_protocol_error(bad):
    """An instance that is not 1-64 characters of [0-9A-Za-z_-] is refused naming the key."""
    with pytest.raises(ProtocolError, match=r"status result\.instance"):
        protocol.parse_status({"clock": 1.0, "busy": False, "interlock": None,
                               "setpoints": {"velocity": 500.0}, "shots_total": 3, "instance": bad})
