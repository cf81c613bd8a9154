"""Fixtures of the bus tests: simulated rig servers in real subprocesses and clients (the
servers and the throwaway CURVE keys are tests/conftest.py's)."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import pytest
from rig_process import REPO, SEED, SIM_CONFIG, ServerProcess, spawn_server  # noqa: F401  (re-exported to the bus tests)

from autotune.wire.bus import BusClient


@pytest.fixture
def start_server(servers: Callable[..., ServerProcess]) -> Callable[..., ServerProcess]:
    """Factory of server subprocesses, all stopped at teardown (tests/conftest.py's
    ``servers``, under the name the bus tests use)."""
    return servers


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
