"""Fixtures of every test folder: simulated rigs in real subprocesses, throwaway CURVE keys."""

from __future__ import annotations

import shutil
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
import zmq.auth
from rig_process import CurveFiles, ServerProcess, spawn_server


@pytest.fixture
def servers(tmp_path: Path) -> Iterator[Callable[..., ServerProcess]]:
    """Factory of server subprocesses (:func:`rig_process.spawn_server`: ``autotune rig`` by
    default, on a loopback port), all stopped at teardown.

    ``servers(*flags, name=None, **options)``: ``flags`` go to the command line (fault
    injection such as ``--drop-probability 0.33``), ``options`` to ``spawn_server`` (``seed``,
    ``config``, ``command``, ...); ``name`` (default ``rig0``, ``rig1``, ...) names its ready
    and log files in the test's folder.
    """
    started: list[ServerProcess] = []

    def start(*flags: str, name: str | None = None, **options: Any) -> ServerProcess:
        server = spawn_server(tmp_path, name or f"rig{len(started)}", *flags, **options)
        started.append(server)
        return server

    yield start
    for server in started:
        server.stop()


@pytest.fixture
def curve_files(tmp_path: Path) -> CurveFiles:
    """A server key pair, one allowed client and one stranger, made fresh for the test
    (pyzmq's ``zmq.auth.create_certificates``)."""
    keys = tmp_path / "keys"
    for folder in ("server", "client", "stranger"):
        (keys / folder).mkdir(parents=True)
    server_public, server_secret = zmq.auth.create_certificates(keys / "server", "server")
    client_public, client_secret = zmq.auth.create_certificates(keys / "client", "client")
    _, stranger_secret = zmq.auth.create_certificates(keys / "stranger", "stranger")
    allowed = keys / "allowed"
    allowed.mkdir()
    shutil.copy(client_public, allowed / Path(client_public).name)
    return CurveFiles(Path(server_public), Path(server_secret), allowed, Path(client_secret),
                      Path(stranger_secret))
