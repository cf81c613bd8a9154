"""The README's kit commands, run exactly as written (PORT replaced by a free port)."""

from __future__ import annotations

import signal
import socket
import subprocess
import time

import pytest
from rig_process import REPO, STOP_TIMEOUT_S, autotune_command

from autotune.wire.bus import BusClient

README = (REPO / "README.md").read_text(encoding="utf-8")


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _argv(line: str, port: int) -> list[str]:
    """A README line as argv: the installed console script (the module if not installed)."""
    words = line.replace("PORT", str(port)).split()
    assert words[0] == "autotune"
    return autotune_command() + words[1:]


@pytest.mark.parametrize(("serve_line", "probe_line"), [
    ("autotune serve --config examples/lab_driver/DRIVER.toml --bind tcp://127.0.0.1:PORT",
     "autotune probe tcp://127.0.0.1:PORT --yes"),
    ("autotune serve --config configs/sim-driver.toml --bind tcp://127.0.0.1:PORT",
     "autotune probe tcp://127.0.0.1:PORT"),
])
def test_readme_serve_then_probe(serve_line: str, probe_line: str):
    """Each README pair: the server starts, the probe passes every rule (exit 0), SIGTERM stops it (exit 0)."""
    assert f"    {serve_line}\n    {probe_line}\n" in README
    port = _free_port()
    server = subprocess.Popen(_argv(serve_line, port), cwd=REPO, stdin=subprocess.DEVNULL,
                              stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        with BusClient(f"tcp://127.0.0.1:{port}", timeout_s=1.0, retries=0, backoff_s=0.0) as client:
            deadline = time.monotonic() + 30
            while True:
                try:
                    client.describe()
                    break
                except Exception:  # noqa: BLE001 - not listening yet
                    assert server.poll() is None and time.monotonic() < deadline
        probe = subprocess.run(_argv(probe_line, port), cwd=REPO, capture_output=True, text=True,
                               timeout=120, stdin=subprocess.DEVNULL)
        assert probe.returncode == 0, probe.stdout + probe.stderr
        assert "0 failed" in probe.stdout and "0 not run" in probe.stdout
    finally:
        server.send_signal(signal.SIGTERM)
        _, err = server.communicate(timeout=STOP_TIMEOUT_S * 2)
    assert server.returncode == 0, err.decode()[-2000:]
