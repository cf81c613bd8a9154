"""Fixtures of the bus tests: simulated rig servers in real subprocesses, clients, throwaway keys."""

from __future__ import annotations

import shutil
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
import zmq.auth
from rig_process import REPO, SEED, SIM_CONFIG, ServerProcess, spawn_server  # noqa: F401  (re-exported to the bus tests)

from autotune.bus import BusClient


@pytest.fixture
def start_server(tmp_path: Path) -> Iterator[Callable[..., ServerProcess]]:
    """Factory of server subprocesses, all stopped at teardown."""
    started: list[ServerProcess] = []
    counter = iter(range(1000))

    def start(*flags: str, name: str | None = None, **options: Any) -> ServerProcess:
        server = spawn_server(tmp_path, name or f"server{next(counter)}", *flags, **options)
        started.append(server)
        return server

    yield start
    for server in started:
        server.stop()


@pytest.fixture
def make_client() -> Iterator[Callable[..., BusClient]]:
    """Factory of bus clients with small test timeouts, all closed at teardown."""
    clients: list[BusClient] = []

    def make(endpoint: str, **options: Any) -> BusClient:
        settings: dict[str, Any] = {"timeout_s": 1.0, "retries": 3, "backoff_s": 0.02}
        settings.update(options)
        client = BusClient(endpoint, **settings)
        clients.append(client)
        return client

    yield make
    for client in clients:
        client.close()


@dataclass(frozen=True)
class CurveFiles:
    """Throwaway CURVE certificate files of one test."""

    server_public: Path
    server_secret: Path
    allowed_dir: Path
    client_secret: Path
    stranger_secret: Path


@pytest.fixture
def curve_files(tmp_path: Path) -> CurveFiles:
    """A server key pair, one allowed client and one stranger, made fresh for the test."""
    keys = tmp_path / "keys"
    for folder in ("server", "client", "stranger"):
        (keys / folder).mkdir(parents=True)
    server_public, server_secret = zmq.auth.create_certificates(keys / "server", "server")
    client_public, client_secret = zmq.auth.create_certificates(keys / "client", "client")
    _, stranger_secret = zmq.auth.create_certificates(keys / "stranger", "stranger")
    allowed = keys / "allowed"
    allowed.mkdir()
    shutil.copy(client_public, allowed / Path(client_public).name)
    return CurveFiles(Path(server_public), Path(server_secret), allowed, Path(client_secret), Path(stranger_secret))
