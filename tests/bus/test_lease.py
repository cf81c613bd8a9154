"""One driver per rig: the lease of the wire protocol, in the book, over a real socket to
``autotune rig``, and in a first-edition rig that does not offer it."""

from __future__ import annotations

import threading
import time
from collections.abc import Callable

import pytest
import zmq

from autotune.wire import protocol
from autotune.wire.bus import BusClient
from autotune.errors import RigLeased, RigRefused
from autotune.kit.lease import LeaseBook, LeaseHeld
from autotune.wire.protocol import ErrorKind, Op, RequestRejected

from .conftest import ServerProcess


class _Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_the_book_gives_the_rig_to_one_client_until_release_or_expiry() -> None:
    """claim, renewal by the holder, refusal of another client naming the holder and the time
    left, reading and safe ops open to all, expiry, release."""
    clock = _Clock()
    book = LeaseBook(clock=clock, wall=lambda: 0.0)
    assert book.claim("a", 10.0)["renewed"] is False
    clock.now += 6.0
    assert book.claim("a", 10.0)["renewed"] is True  # renewed: 10 s from now again
    with pytest.raises(LeaseHeld, match=r"rig leased by a for another 10\.0 s") as held:
        book.claim("b", 10.0)
    assert (held.value.holder, held.value.expires_in_s) == ("a", 10.0)
    for op in (Op.APPLY, Op.ACQUIRE, Op.ADVANCE):
        with pytest.raises(LeaseHeld):
            book.check(op, "b")
        with pytest.raises(LeaseHeld):
            book.check(op, None)
        book.check(op, "a")
    for op in (Op.DESCRIBE, Op.STATUS, Op.SAFE, Op.TRUTH, Op.THERMAL_STEP):
        book.check(op, "b")
    with pytest.raises(LeaseHeld):
        book.release("b")
    clock.now += 25.0  # a request of the holder longer than its ttl ...
    book.renew_if_held("a")  # ... renews the lease when it ends
    book.renew_if_held("b")  # (a stranger's request renews nothing)
    assert book.holder().client == "a" and book.holder().expires_at == clock.now + 10.0
    clock.now += 10.0
    assert book.holder() is None  # ran out
    book.check(Op.APPLY, "b")
    assert book.claim("b", 5.0)["holder"] == "b"
    assert book.release("b") == {"released": True}
    assert book.release("b") == {"released": False}


def test_claim_and_release_need_a_client_and_a_ttl_within_bounds() -> None:
    """The request key ``client`` is checked; ``claim`` without it, or with a ttl out of
    (0, MAX_LEASE_TTL_S], is ``bad_request``; other ops take it as optional."""
    msg_id = protocol.new_msg_id()
    request = protocol.decode_request(protocol.encode_request(Op.APPLY, {"setpoints": {"detuning": 1.0}},
                                                              msg_id, client="me@host pid 1 (x)"))
    assert request.client == "me@host pid 1 (x)"
    assert protocol.decode_request(protocol.encode_request(Op.STATUS, {}, msg_id)).client is None
    bad = [b'{"proto":1,"msg_id":"ab","op":"claim","args":{"ttl_s":5}}',
           b'{"proto":1,"msg_id":"ab","op":"claim","args":{"ttl_s":0},"client":"x"}',
           b'{"proto":1,"msg_id":"ab","op":"claim","args":{"ttl_s":4000},"client":"x"}',
           b'{"proto":1,"msg_id":"ab","op":"status","args":{},"client":""}',
           b'{"proto":1,"msg_id":"ab","op":"status","args":{},"client":"tab\\there"}']
    for data in bad:
        with pytest.raises(RequestRejected) as refused:
            protocol.decode_request(data)
        assert refused.value.kind is ErrorKind.BAD_REQUEST and refused.value.msg_id == "ab"


def test_a_second_client_is_refused_until_the_first_releases(start_server: Callable[..., ServerProcess],
                                                               make_client: Callable[..., BusClient]) -> None:
    """Over a real socket to ``autotune rig``: the holder moves and acquires; a second client
    cannot claim (RigLeased naming the holder), move or acquire, but describes, reads status and
    sends safe (logged with its name); once released, the second client claims."""
    server = start_server()
    first, second = make_client(server.endpoint), make_client(server.endpoint)
    first.describe()
    second.describe()
    lease = first.claim("alice@lab pid 1 (calibrate)")
    assert lease is not None and lease.holder == "alice@lab pid 1 (calibrate)"
    status = first.status()
    first.apply({"detuning": status.setpoints["detuning"] + 1e3})
    first.acquire("empty", 0.0, 10)
    with pytest.raises(RigLeased, match=r"alice@lab pid 1 \(calibrate\) for another") as refused:
        second.claim("bob@lab pid 2 (retune)")
    assert refused.value.kind == "leased" and "until" in refused.value.detail
    with pytest.raises(RigRefused, match="leased"):
        second.apply({"detuning": status.setpoints["detuning"]})
    with pytest.raises(RigRefused, match="leased"):
        second.acquire("empty", 0.0, 10)
    assert second.status().shots_total == first.status().shots_total
    second.safe()
    safe_events = server.wait_for_event("safe_requested")
    assert safe_events and safe_events[-1]["level"] == "warning"
    assert safe_events[-1]["holder"] == "alice@lab pid 1 (calibrate)"
    first.release()
    assert second.claim("bob@lab pid 2 (retune)") is not None
    second.release()


def test_a_lease_not_renewed_runs_out_and_the_keeper_renews_one_that_is(
        start_server: Callable[..., ServerProcess], make_client: Callable[..., BusClient]) -> None:
    """A client that claimed for 1 s and died (a raw claim, never renewed) frees the rig after
    1 s; a BusClient's lease of 1 s stays held over 2.5 s by its keeper thread."""
    server = start_server()
    with zmq.Context() as context, context.socket(zmq.REQ) as raw:
        raw.setsockopt(zmq.LINGER, 0)
        raw.setsockopt(zmq.RCVTIMEO, 5000)
        raw.connect(server.endpoint)
        msg_id = protocol.new_msg_id()
        raw.send(protocol.encode_request(Op.CLAIM, {"ttl_s": 1.0}, msg_id, client="gone pid 9"))
        assert protocol.parse_claim(protocol.decode_reply(raw.recv(), msg_id)).ttl_s == 1.0
    client, stranger = make_client(server.endpoint), make_client(server.endpoint)
    with pytest.raises(RigLeased, match="gone pid 9"):
        client.claim("kept pid 10", ttl_s=1.0)
    assert client.claim("kept pid 10", ttl_s=1.0, wait_s=3.0) is not None  # after the expiry
    time.sleep(2.5)
    with pytest.raises(RigLeased, match="kept pid 10"):
        stranger.claim("stranger pid 11")


def _first_edition_rig(context: zmq.Context, box: list[str], stop: threading.Event) -> None:
    """A rig of the protocol's first edition on a real socket: autotune's request handler
    behind the strict key check of that edition, which refuses the key ``client``."""
    import json

    from autotune.kit.served import ServedDriver
    from autotune.kit.server import FaultConfig, RigServer
    from drivers_sim.driver import SimulatedDriver
    from rig_process import SEED, SIM_CONFIG

    handler = RigServer(ServedDriver(SimulatedDriver.from_file(SIM_CONFIG, seed=SEED)),
                        "inproc://never-bound", faults=FaultConfig())
    with context.socket(zmq.ROUTER) as sock:
        sock.setsockopt(zmq.LINGER, 0)
        sock.bind("tcp://127.0.0.1:*")
        box.append(sock.getsockopt_string(zmq.LAST_ENDPOINT))
        while not stop.is_set():
            if not sock.poll(100):
                continue
            *envelope, payload = sock.recv_multipart()
            message = json.loads(payload)
            if "client" in message:
                reply = protocol.encode_error(message["msg_id"], ErrorKind.BAD_REQUEST,
                                              "request: unknown key 'client' (expected args, "
                                              "msg_id, op, proto)")
            else:
                reply = handler.handle(payload)
            sock.send_multipart([*envelope, reply])


def test_a_rig_without_leases_works_with_one_warning(make_client: Callable[..., BusClient]) -> None:
    """A first-edition rig refuses the claim as a bad request: the client warns once, sends no
    identity afterwards and moves the rig as before."""
    from structlog.testing import capture_logs

    box: list[str] = []
    stop = threading.Event()
    context = zmq.Context()
    thread = threading.Thread(target=_first_edition_rig, args=(context, box, stop), daemon=True)
    thread.start()
    try:
        deadline = time.monotonic() + 30
        while not box and time.monotonic() < deadline:
            time.sleep(0.05)
        client = make_client(box[0])
        client.describe()
        with capture_logs() as logs:
            assert client.claim("me pid 1 (calibrate)") is None
            status = client.status()
            client.apply({"detuning": status.setpoints["detuning"] + 1e3})
        warnings = [e for e in logs if e["log_level"] == "warning"]
        assert [e["event"] for e in warnings] == ["rig_without_lease"]
    finally:
        stop.set()
        thread.join(timeout=10)
        context.term()


def test_a_run_that_lost_its_lease_stops_without_sending_safe(
        tmp_path, start_server: Callable[..., ServerProcess],
        make_client: Callable[..., BusClient]) -> None:
    """A client whose lease ran out (its keeper stalled) and was taken by another: its next
    move is refused leased, the run ends aborted without a safe request (the rig is the other
    client's now), and the journal says why."""
    from autotune.run import runner
    from autotune.run.journal import JOURNAL_NAME, read_journal
    from test_resume import small_config

    server = start_server()
    client = make_client(server.endpoint, timeout_s=5.0)
    assert client.claim("stalled pid 1 (calibrate)", ttl_s=1.0) is not None
    client._keeper.stop()  # the process froze: nothing renews the lease any more
    time.sleep(1.3)
    other = make_client(server.endpoint)
    assert other.claim("other pid 2 (retune)") is not None
    with pytest.raises(RigLeased, match="other pid 2"):
        runner.calibrate(client, small_config(), tmp_path / "run", store=tmp_path / "good.json")
    records = read_journal(tmp_path / "run" / JOURNAL_NAME)
    assert records[-1] == {**records[-1], "type": "end", "status": "aborted"}
    assert not [r for r in records if r["type"] in ("safe", "safe_failed")]
    abort = [r for r in records if r["type"] == "decision" and r["what"] == "abort"]
    assert abort and "not sent to its safe set-points" in abort[-1]["reason"]
    assert not [e for e in server.events() if e.get("event") == "safe_requested"]
