"""The server as a process: ready file, clean stop on signals, refusal of bad flags."""

from __future__ import annotations

import signal
import socket as stdlib_socket

import pytest
from rig_process import STOP_TIMEOUT_S


def test_ready_file_holds_the_bound_loopback_port(start_server):
    """With port 0 the ready file names the loopback address and the port the OS really gave."""
    server = start_server()
    host, port = server.endpoint.removeprefix("tcp://").rsplit(":", 1)
    assert host == "127.0.0.1" and 0 < int(port) < 65536
    # The port is taken: binding it again from here must fail (POSIX bind semantics).
    probe = stdlib_socket.socket(stdlib_socket.AF_INET, stdlib_socket.SOCK_STREAM)
    try:
        with pytest.raises(OSError):
            probe.bind(("127.0.0.1", int(port)))
    finally:
        probe.close()


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT])
def test_signal_stops_the_server_cleanly(start_server, signum):
    """SIGTERM and SIGINT make the server close its sockets and exit with status 0."""
    server = start_server()
    server.process.send_signal(signum)
    assert server.process.wait(timeout=STOP_TIMEOUT_S) == 0
    assert server.wait_for_event("server_stopping")


def test_bad_fault_flag_refuses_to_start(start_server):
    """A drop probability above 1 stops the start with status 2 and a message naming the key."""
    server = start_server("--drop-probability", "1.5", wait=False)
    assert server.process.wait(timeout=30) == 2
    refused = server.wait_for_event("server_refused_to_start")
    assert refused and "drop_reply_probability" in refused[0]["error"] and "1.5" in refused[0]["error"]


def test_port_in_use_exits_with_status_1(start_server):
    """A second server on a port already bound exits with status 1 and logs why."""
    first = start_server()
    second = start_server(bind=first.endpoint, wait=False)
    assert second.process.wait(timeout=30) == 1
    assert second.wait_for_event("server_bind_failed")
