"""A server that dies mid-run: the client reconnects to its successor, or gives up within its bound."""

from __future__ import annotations

import threading
import time

import pytest
from structlog.testing import capture_logs

from autotune.errors import RigMismatch, RigRestarted, RigTimeout

MARGIN_S = 1.0  # scheduling slack on two noisy cores


def test_client_reconnects_to_a_restarted_server(start_server, make_client):
    """After a hard kill, a server restarted on the same port answers the same client's next call."""
    first = start_server(name="first")
    client = make_client(first.endpoint, timeout_s=0.5, retries=12, backoff_s=0.05)
    client.acquire("empty", 0.0, 30)
    first.kill()

    def restart_later() -> None:
        # Down for longer than one attempt's wait, so the first attempt surely goes unanswered
        # and the retry path is what is tested (a successor bound within that wait would get
        # the queued request through ZeroMQ's own reconnect, with no retry at all).
        time.sleep(0.5 + 0.3)
        start_server(name="second", bind=first.endpoint)

    restart = threading.Thread(target=restart_later)
    with capture_logs() as logs:
        restart.start()
        status = client.status()
    restart.join(timeout=60)
    # The successor is a fresh rig: its total cannot include the first server's shots.
    assert status.shots_total == 0
    assert any(entry["event"] == "bus_retry" for entry in logs)


def test_client_gives_up_within_its_bound_when_the_server_stays_down(start_server, make_client):
    """With the server gone for good, the call raises RigTimeout no later than max_wait_s plus a margin."""
    server = start_server()
    client = make_client(server.endpoint, timeout_s=0.2, retries=2, backoff_s=0.05)
    client.status()
    server.kill()
    started = time.monotonic()
    with pytest.raises(RigTimeout, match="3 attempts"):
        client.status()
    elapsed = time.monotonic() - started
    # max_wait_s = 3 * 0.2 + 0.05 + 0.1 = 0.75 s, by the documented doubling backoff.
    assert client.max_wait_s == pytest.approx(0.75)
    assert client.max_wait_s - 0.05 <= elapsed <= client.max_wait_s + MARGIN_S


def test_retries_are_logged_with_endpoint_op_and_msg_id(start_server, make_client):
    """Each retry is logged with the endpoint, the op and the one msg_id reused by every attempt."""
    server = start_server()
    client = make_client(server.endpoint, timeout_s=0.1, retries=2, backoff_s=0.0)
    server.kill()
    with capture_logs() as logs, pytest.raises(RigTimeout):
        client.status()
    retries = [entry for entry in logs if entry["event"] == "bus_retry"]
    assert len(retries) == 2
    assert {(e["endpoint"], e["op"]) for e in retries} == {(server.endpoint, "status")}
    assert len({e["msg_id"] for e in retries}) == 1


def test_a_restarted_rig_is_never_taken_for_the_one_described(start_server, make_client):
    """After describe, a reply from a restarted rig raises RigRestarted naming both instances;
    describing it again accepts the new one (README: rig identity)."""
    first = start_server(name="watched")
    client = make_client(first.endpoint, timeout_s=0.5, retries=12, backoff_s=0.05)
    old = client.describe().instance
    client.apply({"detuning": 10e3})
    first.kill()
    start_server(name="successor", bind=first.endpoint)
    with pytest.raises(RigRestarted, match=f"instance changed from '{old}'"):
        client.status()
    new = client.describe().instance
    assert new != old
    # The successor is at its safe set-points, which the client now takes as the truth.
    assert client.status().setpoints["detuning"] == 0.0


def test_an_acquisition_at_other_setpoints_than_applied_is_refused(start_server, make_client):
    """An acquire reply whose set-points in force differ from the last apply's raises
    RigMismatch with the reply attached, so its shots are accounted but never filed as data."""
    server = start_server(name="moved")
    ours = make_client(server.endpoint)
    other = make_client(server.endpoint)
    ours.describe()
    ours.apply({"detuning": 10e3})
    other.describe()
    other.apply({"detuning": 20e3})  # another client moved the rig under us
    with pytest.raises(RigMismatch, match="not those applied") as info:
        ours.acquire("empty", 0.0, 20)
    assert info.value.reply is not None and info.value.reply.shots == 20


def test_a_clock_that_goes_back_is_a_restart(start_server, make_client):
    """A status whose clock is earlier than one already seen raises RigRestarted even when the
    identity gives nothing away (the watch is told the successor's instance beforehand, so the
    clock check alone must catch it, as for a rig that reports no instance)."""
    first = start_server(name="clocked")
    client = make_client(first.endpoint, timeout_s=0.5, retries=12, backoff_s=0.05)
    client.describe()
    client.acquire("empty", 0.0, 3000)  # 20 s of rig time at 150 shots/s
    first.kill()
    successor = start_server(name="fresh", bind=first.endpoint)
    client._instance = make_client(successor.endpoint).describe().instance
    with pytest.raises(RigRestarted, match="clock went back"):
        client.status()
