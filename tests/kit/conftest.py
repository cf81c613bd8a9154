"""Fixtures of the rig-driver kit tests: served drivers in real subprocesses, throwaway keys."""

from __future__ import annotations

import shutil
import sys
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
import zmq.auth
from rig_process import REPO, ServerProcess, spawn_server

EXAMPLES = REPO / "examples"
EXAMPLE_DRIVER_TOML = EXAMPLES / "lab_driver" / "DRIVER.toml"
SIM_DRIVER_TOML = REPO / "configs" / "sim-driver.toml"

if str(EXAMPLES) not in sys.path:
    # The example package is imported in process by some tests, as DRIVER.toml's python_path does.
    sys.path.insert(0, str(EXAMPLES))


@pytest.fixture
def serve(tmp_path: Path) -> Iterator[Callable[..., ServerProcess]]:
    """Factory of ``autotune serve --config DRIVER.toml`` subprocesses, all stopped at teardown."""
    started: list[ServerProcess] = []

    def start(config: Path = EXAMPLE_DRIVER_TOML, *flags: str, **options: Any) -> ServerProcess:
        name = options.pop("name", f"serve{len(started)}")
        server = spawn_server(tmp_path, name, *flags, config=config, seed=None, command="serve", **options)
        started.append(server)
        return server

    yield start
    for server in started:
        server.stop()


@pytest.fixture
def rig(tmp_path: Path) -> Iterator[Callable[..., ServerProcess]]:
    """Factory of ``autotune rig`` subprocesses (the simulated rig), all stopped at teardown."""
    started: list[ServerProcess] = []

    def start(*flags: str, **options: Any) -> ServerProcess:
        server = spawn_server(tmp_path, f"rig{len(started)}", *flags, **options)
        started.append(server)
        return server

    yield start
    for server in started:
        server.stop()


@dataclass(frozen=True)
class Keys:
    """Throwaway CURVE certificate files of one test."""

    server_public: Path
    server_secret: Path
    allowed_dir: Path
    client_secret: Path


@pytest.fixture
def keys(tmp_path: Path) -> Keys:
    """A server key pair and one allowed client, made fresh for the test."""
    folder = tmp_path / "keys"
    for name in ("server", "client", "allowed"):
        (folder / name).mkdir(parents=True)
    server_public, server_secret = zmq.auth.create_certificates(folder / "server", "server")
    client_public, client_secret = zmq.auth.create_certificates(folder / "client", "client")
    shutil.copy(client_public, folder / "allowed" / Path(client_public).name)
    return Keys(Path(server_public), Path(server_secret), folder / "allowed", Path(client_secret))
