"""Dropped, delayed and corrupt replies: the client recovers within its budget, nothing counts twice.

Each test also checks from the server's own log that the fault really happened, so that a
pass cannot come from a quiet run.
"""

from __future__ import annotations

import time

import pytest

from autotune.errors import RigTimeout

SHOTS = 40


def _acquire_many(client, count: int) -> int:
    """Take ``count`` acquisitions; return the shots the client believes it took."""
    believed = 0
    for k in range(count):
        believed += client.acquire("empty" if k % 2 else "one_photon", 0.3 * k, SHOTS).shots
    return believed


def test_dropped_replies_are_recovered_without_double_counting(start_server, make_client):
    """With 30 % of replies dropped, the rig's shot total equals the client's (cached replays, no re-run)."""
    server = start_server("--drop-probability", "0.3")
    client = make_client(server.endpoint, timeout_s=0.25, retries=8, backoff_s=0.01)
    believed = _acquire_many(client, 12)
    # Idempotent retry (same msg_id, cached reply) is common practice for at-least-once transports.
    assert client.status().shots_total == believed
    assert server.wait_for_event("fault_drop_reply")
    assert server.wait_for_event("request_replayed")


def test_corrupt_replies_are_recovered_without_double_counting(start_server, make_client):
    """With 30 % of replies corrupted, the client resends, the server replays, totals agree."""
    server = start_server("--corrupt-probability", "0.3")
    client = make_client(server.endpoint, timeout_s=0.5, retries=8, backoff_s=0.01)
    believed = _acquire_many(client, 12)
    assert client.status().shots_total == believed
    assert server.wait_for_event("fault_corrupt_reply")
    assert server.wait_for_event("request_replayed")


def test_reply_slower_than_timeout_is_fetched_by_retry(start_server, make_client):
    """A reply delayed beyond one timeout is got by the retry from the cache, executed once."""
    server = start_server("--delay-s", "0.4")
    client = make_client(server.endpoint, timeout_s=0.2, retries=3, backoff_s=0.01)
    believed = _acquire_many(client, 3)
    assert client.status().shots_total == believed
    assert len(server.wait_for_event("request_replayed")) >= 4


def test_reply_delayed_within_timeout_needs_no_retry(start_server, make_client):
    """A reply delayed less than the timeout arrives on the first attempt (no replay)."""
    server = start_server("--delay-s", "0.1")
    client = make_client(server.endpoint, timeout_s=1.0, retries=0)
    started = time.monotonic()
    client.status()
    assert time.monotonic() - started >= 0.1
    assert not [e for e in server.events() if e.get("event") == "request_replayed"]


def test_exit_fault_stops_the_server_cleanly(start_server, make_client):
    """exit_after_messages stops the server with status 0 after answering that many messages."""
    server = start_server("--exit-after", "2")
    # No retry (a retry would be a third message); a timeout that a loaded 2-core machine meets.
    client = make_client(server.endpoint, timeout_s=5.0, retries=0)
    client.status()
    client.status()
    assert server.process.wait(timeout=5) == 0
    with pytest.raises(RigTimeout):
        make_client(server.endpoint, timeout_s=0.3, retries=0).status()
