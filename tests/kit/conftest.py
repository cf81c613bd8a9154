"""Fixtures of the rig-driver kit tests: served drivers in real subprocesses, throwaway keys."""

from __future__ import annotations

import itertools
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from rig_process import REPO, CurveFiles, ServerProcess

EXAMPLES = REPO / "examples"
EXAMPLE_DRIVER_TOML = EXAMPLES / "lab_driver" / "DRIVER.toml"
SIM_DRIVER_TOML = REPO / "configs" / "sim-driver.toml"

if str(EXAMPLES) not in sys.path:
    # The example package is imported in process by some tests, as DRIVER.toml's python_path does.
    sys.path.insert(0, str(EXAMPLES))


@pytest.fixture
def serve(servers: Callable[..., ServerProcess]) -> Callable[..., ServerProcess]:
    """Factory of ``autotune serve --config DRIVER.toml`` subprocesses, all stopped at teardown
    (tests/conftest.py's ``servers``); named ``serve0``, ``serve1``, ... unless told."""
    count = itertools.count()

    def start(config: Path = EXAMPLE_DRIVER_TOML, *flags: str, name: str | None = None,
              **options: Any) -> ServerProcess:
        return servers(*flags, name=name or f"serve{next(count)}", config=config, seed=None,
                       command="serve", **options)

    return start


@pytest.fixture
def rig(servers: Callable[..., ServerProcess]) -> Callable[..., ServerProcess]:
    """Factory of ``autotune rig`` subprocesses (the simulated rig), all stopped at teardown
    (tests/conftest.py's ``servers``)."""
    return servers


#: The key files of the kit's tests (tests/conftest.py's ``curve_files``).
Keys = CurveFiles


@pytest.fixture
def keys(curve_files: CurveFiles) -> CurveFiles:
    """A server key pair and one allowed client, made fresh for the test."""
    return curve_files
