"""autotune probe against real servers: a conforming simulated rig, the example driver, CURVE,
and deliberately broken servers it must catch (real processes, loopback, random ports)."""

from __future__ import annotations

import re
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from rig_process import REPO, START_TIMEOUT_S, STOP_TIMEOUT_S

from autotune.wire.bus import BusClient
from autotune.kit.probe import RULES

from .conftest import Keys

FLAWED = Path(__file__).with_name("flawed_rig.py")
LINE = re.compile(r"^(PASS|FAIL|WARN|SKIP) +(\S+) +expected: ")


def _probe(endpoint: str, *flags: str, timeout_s: float = 3.0) -> subprocess.CompletedProcess[str]:
    """``autotune probe ENDPOINT`` with no terminal on stdin, as a test or a cron job runs it."""
    return subprocess.run([sys.executable, "-m", "autotune.cli", "probe", endpoint, "--timeout-s", str(timeout_s),
                           *flags], capture_output=True, text=True, timeout=120, cwd=REPO,
                          stdin=subprocess.DEVNULL)


def _outcomes(stdout: str) -> dict[str, str]:
    found = {}
    for line in stdout.splitlines():
        match = LINE.match(line)
        if match:
            found[match.group(2)] = match.group(1)
    return found


@pytest.fixture
def flawed(tmp_path: Path) -> Iterator[Callable[[str], str]]:
    """Factory of flawed servers (tests/kit/flawed_rig.py) in subprocesses; returns the endpoint."""
    processes: list[subprocess.Popen[bytes]] = []

    def start(flaw: str) -> str:
        ready = tmp_path / f"{flaw}.ready"
        process = subprocess.Popen([sys.executable, str(FLAWED), flaw, str(ready)], cwd=REPO,
                                   stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                   stderr=subprocess.DEVNULL)
        processes.append(process)
        deadline = time.monotonic() + START_TIMEOUT_S
        while not ready.exists():
            assert process.poll() is None, f"flawed server {flaw} exited with {process.returncode}"
            assert time.monotonic() < deadline, f"flawed server {flaw} not ready"
            time.sleep(0.02)
        return ready.read_text().strip()

    yield start
    for process in processes:
        process.terminate()
        try:
            process.wait(timeout=STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=STOP_TIMEOUT_S)


def test_simulated_rig_passes_every_rule_without_a_question(rig):
    """Against `autotune rig` (describes itself simulated) every rule passes and the exit status is 0."""
    server = rig()
    done = _probe(server.endpoint)
    outcomes = _outcomes(done.stdout)
    assert done.returncode == 0, done.stdout + done.stderr
    assert set(outcomes) == set(RULES) and set(outcomes.values()) == {"PASS"}
    assert "Move the rig" not in done.stderr and "CAUTION" not in done.stderr


def test_example_driver_passes_every_rule_with_yes(serve):
    """Against `autotune serve` with the example driver, --yes lets the probe move it and all rules pass."""
    server = serve()
    done = _probe(server.endpoint, "--yes")
    assert done.returncode == 0, done.stdout + done.stderr
    assert set(_outcomes(done.stdout).values()) == {"PASS"}
    assert "CAUTION" in done.stderr  # the usual caution before acting on a rig that is not simulated


def test_no_terminal_and_no_yes_moves_nothing(serve):
    """A rig that is not simulated, no terminal and no --yes: the probe says so, moves nothing, exits 5."""
    server = serve()
    with BusClient(server.endpoint, timeout_s=5.0, retries=1, backoff_s=0.1) as client:
        before = client.status()
        done = _probe(server.endpoint)
        after = client.status()
    assert done.returncode == 5, done.stdout + done.stderr
    assert "not moving the rig: no terminal to ask and no --yes" in done.stderr
    outcomes = _outcomes(done.stdout)
    assert {outcomes[rule] for rule in ("apply", "acquire", "replay", "safe")} == {"SKIP"}
    assert outcomes["version"] == "PASS" and outcomes["describe"] == "PASS"
    assert (dict(after.setpoints), after.shots_total) == (dict(before.setpoints), before.shots_total)


@pytest.mark.parametrize(("answer", "code"), [("yes", 0), ("no", 5)])
def test_probe_asks_on_a_terminal(serve, answer: str, code: int):
    """With a terminal and no --yes the probe shows the caution and its plan and asks: 'yes' runs
    every rule, anything else moves nothing (exit 5)."""
    import os
    import pty

    server = serve()
    master, terminal = pty.openpty()
    try:
        process = subprocess.Popen([sys.executable, "-m", "autotune.cli", "probe", server.endpoint, "--timeout-s", "3"],
                                   stdin=terminal, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                   cwd=REPO)
        os.close(terminal)
        os.write(master, f"{answer}\n".encode())
        out, err = process.communicate(timeout=120)
    finally:
        os.close(master)
    assert process.returncode == code, out + err
    assert "Move the rig for the probe? Type 'yes' to go on:" in out
    assert "CAUTION" in err and "The probe will move rig 'bench-2'" in err
    assert _outcomes(out)["apply"] == ("PASS" if answer == "yes" else "SKIP")


@pytest.mark.parametrize(("flaw", "rules"), [
    # Without a replay cache a reused msg_id cannot be recognised either.
    ("replays_nothing", {"replay", "msg_id.reuse"}),
    ("accepts_nan", {"nonfinite"}),
    ("unknown_op_bad_request", {"unknown_op"}),
    ("ignores_steps", {"refuse.step"}),
    ("ignores_lease", {"lease.refuse"}),
])
def test_broken_server_is_caught(flawed, flaw: str, rules: set[str]):
    """Each deliberate breach of the protocol fails exactly the rules it breaks; exit status 1."""
    done = _probe(flawed(flaw), "--yes")
    outcomes = _outcomes(done.stdout)
    assert done.returncode == 1, done.stdout
    failed = {name for name, outcome in outcomes.items() if outcome == "FAIL"}
    assert failed == rules, done.stdout


def test_a_retry_after_internal_reaches_the_driver_again(flawed):
    """A driver failing once on the first acquisition: the probe retries with the same msg_id,
    a conforming server runs it again (acquire and internal pass, exit 0); a server that keeps
    the internal reply fails the internal rule (protocol.py, Idempotency)."""
    done = _probe(flawed("fails_once"), "--yes")
    outcomes = _outcomes(done.stdout)
    assert done.returncode == 0, done.stdout
    assert outcomes["internal"] == "PASS" and outcomes["acquire"] == "PASS", done.stdout
    done = _probe(flawed("keeps_internal"), "--yes")
    outcomes = _outcomes(done.stdout)
    assert done.returncode == 1, done.stdout
    assert outcomes["internal"] == "FAIL", done.stdout
    line = next(line for line in done.stdout.splitlines() if line.startswith("FAIL  internal"))
    assert "its reply was kept" in line and "bad_request" in line


def test_server_without_instance_is_a_warning_only(flawed):
    """No rig identity is allowed by the protocol: a WARN line, exit status 0."""
    done = _probe(flawed("no_instance"), "--yes")
    assert done.returncode == 0, done.stdout
    assert _outcomes(done.stdout)["instance"] == "WARN"


def test_server_without_leases_is_a_warning_only(flawed):
    """A rig of the protocol's first edition (no claim, no client key): the lease rules warn
    once and are not run, every other rule passes, exit status 5 (some rules not run)."""
    done = _probe(flawed("no_lease"), "--yes")
    outcomes = _outcomes(done.stdout)
    assert outcomes["lease.claim"] == "WARN", done.stdout
    assert {outcomes[r] for r in ("lease.refuse", "lease.safe", "lease.release", "lease.expiry")} == {"SKIP"}
    assert "FAIL" not in outcomes.values() and done.returncode == 5, done.stdout


def test_replay_failure_says_what_happened(flawed):
    """The replay line states the expectation and that shots were counted twice."""
    done = _probe(flawed("replays_nothing"), "--yes")
    line = next(line for line in done.stdout.splitlines() if line.startswith("FAIL  replay"))
    assert "expected: a repeated msg_id answered with the first reply" in line
    assert "shots_total grew by 40" in line or "two different replies" in line


def test_probe_with_curve_keys(rig, keys: Keys):
    """With the client's keys the probe passes a CURVE rig; without them it gets no reply (exit 3)."""
    server = rig("--curve-secret-key", str(keys.server_secret), "--curve-allowed-dir", str(keys.allowed_dir))
    done = _probe(server.endpoint, "--curve-client-secret-key", str(keys.client_secret),
                  "--curve-server-public-key", str(keys.server_public))
    assert done.returncode == 0, done.stdout + done.stderr
    plain = _probe(server.endpoint, timeout_s=0.5)
    assert plain.returncode == 3 and "FAIL  describe" in plain.stdout


def test_nothing_listening_exits_3(tmp_path: Path):
    """No rig at the endpoint: describe fails with no reply within the bound, exit status 3."""
    import socket

    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    done = _probe(f"tcp://127.0.0.1:{port}", timeout_s=0.3)
    assert done.returncode == 3
    assert "no reply within 0.3 s" in done.stdout


@pytest.mark.parametrize("flags", [("not-an-endpoint",), ("tcp://127.0.0.1:5560", "--curve-client-secret-key", "x")])
def test_bad_input_exits_2(flags):
    """An endpoint without a scheme, or only one of the two CURVE key flags: exit status 2."""
    done = subprocess.run([sys.executable, "-m", "autotune.cli", "probe", *flags], capture_output=True, text=True,
                          timeout=60, cwd=REPO, stdin=subprocess.DEVNULL)
    assert done.returncode == 2, done.stderr
