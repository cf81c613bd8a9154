"""Simulated rig servers in real subprocesses, shared by the bus and the loop tests.

They are started the documented way, ``autotune rig ...`` (as ``python -m autotune.cli rig`` so
that the worktree's code is the one run).
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

REPO = Path(__file__).resolve().parents[1]
SIM_CONFIG = REPO / "configs" / "sim-rig.toml"
SEED = 20240611
START_TIMEOUT_S = 30.0  # a cold start imports numpy and scipy on a busy machine
STOP_TIMEOUT_S = 5.0


def autotune_command() -> list[str]:
    """The ``autotune`` console script of the environment running the tests, as a user types
    it (the one beside ``sys.executable``: a PATH lookup could find another installation's);
    the module entry point where the package is not installed with its script."""
    script = Path(sys.executable).with_name("autotune")
    return [str(script)] if script.is_file() else [sys.executable, "-m", "autotune.cli"]


@dataclass
class ServerProcess:
    """An ``autotune rig`` (or ``autotune serve``) child process and what it told us."""

    process: subprocess.Popen[bytes]
    endpoint: str
    log_path: Path
    ready_path: Path
    _log_file: Any = field(repr=False, default=None)

    @property
    def port(self) -> int:
        """The TCP port it listens on."""
        return int(self.endpoint.rsplit(":", 1)[1])

    def events(self) -> list[dict[str, Any]]:
        """The JSON log lines it wrote to stderr so far."""
        lines = self.log_path.read_text(encoding="utf-8", errors="replace").splitlines()
        return [json.loads(line) for line in lines if line.startswith("{")]

    def wait_for_event(self, name: str, timeout_s: float = 3.0) -> list[dict[str, Any]]:
        """Wait (bounded) until a log event of this name appears; return all such events."""
        deadline = time.monotonic() + timeout_s
        while True:
            found = [e for e in self.events() if e.get("event") == name]
            if found or time.monotonic() > deadline:
                return found
            time.sleep(0.02)

    def kill(self) -> None:
        """Kill it hard (SIGKILL) and reap it."""
        if self.process.poll() is None:
            self.process.kill()
        self.process.wait(timeout=STOP_TIMEOUT_S)

    def stop(self) -> None:
        """Terminate it (SIGTERM), escalating to SIGKILL after a bound."""
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=STOP_TIMEOUT_S)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=STOP_TIMEOUT_S)
        if self._log_file is not None and not self._log_file.closed:
            self._log_file.close()


@dataclass(frozen=True)
class CurveFiles:
    """Throwaway CURVE certificate files of one test (tests/conftest.py's ``curve_files``)."""

    server_public: Path
    server_secret: Path
    allowed_dir: Path
    client_secret: Path
    stranger_secret: Path


def spawn_server(tmp_path: Path, name: str, *flags: str, bind: str = "tcp://127.0.0.1:0",
                 seed: int | None = SEED, wait: bool = True, config: Path = SIM_CONFIG,
                 command: str = "rig") -> ServerProcess:
    """Start ``autotune rig`` (or ``command``, e.g. ``serve``, with ``seed=None``) as a subprocess;
    with ``wait``, block (bounded) until its ready file appears."""
    ready = tmp_path / f"{name}.ready"
    log_path = tmp_path / f"{name}.log"
    ready.unlink(missing_ok=True)
    log_file = open(log_path, "wb")  # noqa: SIM115 - closed by ServerProcess.stop
    seed_flags = [] if seed is None else ["--seed", str(seed)]
    argv = [sys.executable, "-m", "autotune.cli", command, "--config", str(config), "--bind", bind,
            *seed_flags, "--ready-file", str(ready), "--log-level", "info", *flags]
    process = subprocess.Popen(argv, cwd=REPO, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=log_file)
    server = ServerProcess(process, "", log_path, ready, log_file)
    if not wait:
        return server
    deadline = time.monotonic() + START_TIMEOUT_S
    while not ready.exists():
        if process.poll() is not None:
            server.stop()
            pytest.fail(f"server exited with {process.returncode} before listening:\n{log_path.read_text()}")
        if time.monotonic() > deadline:
            server.stop()
            pytest.fail(f"server not ready within {START_TIMEOUT_S} s:\n{log_path.read_text()}")
        time.sleep(0.02)
    server.endpoint = ready.read_text(encoding="utf-8").strip()
    return server
