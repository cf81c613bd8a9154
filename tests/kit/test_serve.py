"""autotune serve and autotune rig as processes: ready file, bus round trips, CURVE, refusals,
exit codes, and the simulated rig calibrated through the Stark channel map."""

from __future__ import annotations

import json
import math
import re
import shutil
import signal
import socket
import subprocess
import sys
import time
import tomllib
from pathlib import Path
from typing import Any

import pytest

from cli_helpers import to_toml as _toml
from rig_process import REPO, STOP_TIMEOUT_S, autotune_command

from autotune.wire.bus import BusClient, CurveClientKeys
from autotune.errors import RigRefused

from .conftest import EXAMPLE_DRIVER_TOML, SIM_DRIVER_TOML, Keys

K, BIAS, GAP = -25.0, 150.0, 0.02  # Stark constants of configs/sim-driver.toml (docs/physics.md section 4)


def _client(endpoint: str, timeout_s: float = 5.0, **options: object) -> BusClient:
    return BusClient(endpoint, timeout_s=timeout_s, retries=1, backoff_s=0.1, **options)


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _autotune_script() -> list[str]:
    """The installed console script, as a user types it (the module entry point if not installed)."""
    return autotune_command()


def test_example_driver_served_over_the_bus(serve):
    """Served by `autotune serve`, the example driver answers describe/apply/acquire/status on loopback."""
    server = serve()
    assert server.endpoint.startswith("tcp://127.0.0.1:")
    with _client(server.endpoint) as client:
        description = client.describe()
        assert description.rig == "bench-2" and description.instance
        applied = client.apply({"detuning": -10e3})
        assert applied.setpoints["detuning"] == -10e3 and applied.instance == description.instance
        acquisition = client.acquire("one_photon", 0.5, 150)
        assert acquisition.shots == 150 and acquisition.t_end - acquisition.t_start == pytest.approx(1.0)
        with pytest.raises(RigRefused) as refused:
            client.truth()
        assert refused.value.kind == "unknown_op"
    loaded = server.wait_for_event("driver_loaded")
    assert loaded and loaded[0]["setpoints"]["detuning"]["channel"] == "STARK:HV1"
    assert "CAUTION" in server.log_path.read_text()  # a rig that is not simulated gets the caution


def test_sigterm_stops_serve_cleanly(serve):
    """SIGTERM makes `autotune serve` close its socket, release the driver and exit 0."""
    server = serve()
    server.process.send_signal(signal.SIGTERM)
    assert server.process.wait(timeout=STOP_TIMEOUT_S) == 0
    assert server.wait_for_event("server_stopping")


def _bad_copy(tmp_path: Path, old: str, new: str) -> Path:
    text = EXAMPLE_DRIVER_TOML.read_text()
    assert old in text
    path = tmp_path / "lab_driver" / "DRIVER.toml"  # its python_path [".."] then finds the copy
    shutil.copytree(EXAMPLE_DRIVER_TOML.parent, path.parent, ignore=shutil.ignore_patterns("__pycache__"))
    path.write_text(text.replace(old, new))
    return path


@pytest.mark.parametrize(("old", "new", "key"), [
    ('channel_unit = "V"', 'channel_unit = "kV"', "setpoints.detuning.channel_unit"),
    ('branch = "positive"', 'branch = "upper"', "setpoints.detuning.branch"),
    ('class = "lab_driver.driver:LabDriver"', 'class = "lab_driver.driver:NoSuchDriver"', "driver.class"),
    ("seed = 7", "seed = 7\ncolour = 1", "driver.options"),
    ("[server]", "[server]\nport = 1", "server.port"),
])
def test_bad_driver_toml_refuses_to_start_with_exit_2(serve, tmp_path: Path, old: str, new: str, key: str):
    """A wrong DRIVER.toml stops the start with status 2, names the key, and never listens."""
    server = serve(_bad_copy(tmp_path, old, new), wait=False)
    assert server.process.wait(timeout=60) == 2
    refused = server.wait_for_event("server_refused_to_start")
    assert refused and key in refused[0]["error"], refused
    assert not server.ready_path.exists()


def test_driver_that_cannot_reach_its_hardware_exits_3(serve, tmp_path: Path):
    """A driver whose constructor cannot connect stops the start with status 3 (rig unreachable)."""
    (tmp_path / "down_driver.py").write_text(
        "class Driver:\n    def __init__(self):\n        raise ConnectionRefusedError('sequencer refused')\n")
    config = tmp_path / "DRIVER.toml"
    config.write_text('[driver]\nclass = "down_driver:Driver"\npython_path = ["."]\n'
                      '[setpoints.velocity]\nunit = "m/s"\nchannel = "v"\nchannel_unit = "m/s"\n'
                      'law = "linear"\nscale = 1.0\n')
    server = serve(config, wait=False)
    assert server.process.wait(timeout=60) == 3
    failed = server.wait_for_event("driver_failed_to_start")
    assert failed and "sequencer refused" in failed[0]["error"]


def _hanging_driver(tmp_path: Path, timeout_s: float) -> Path:
    """A DRIVER.toml whose driver's constructor never returns (a controller that does not
    answer and a library without a timeout)."""
    started = tmp_path / "driver-constructor-entered"
    (tmp_path / "hung_driver.py").write_text(
        "import pathlib, time\nclass Driver:\n    def __init__(self):\n"
        f"        pathlib.Path({str(started)!r}).touch()\n        time.sleep(3600)\n")
    config = tmp_path / "DRIVER.toml"
    config.write_text('[driver]\nclass = "hung_driver:Driver"\npython_path = ["."]\n'
                      f'[server]\nstart_timeout_s = {timeout_s}\n'
                      '[setpoints.velocity]\nunit = "m/s"\nchannel = "v"\nchannel_unit = "m/s"\n'
                      'law = "linear"\nscale = 1.0\n')
    return config


def test_driver_that_hangs_while_starting_exits_3_within_its_start_timeout(serve, tmp_path: Path):
    """Bounded start-up: a driver that never finishes starting stops serve with status 3 after
    [server] start_timeout_s, naming the key; nothing listens."""
    server = serve(_hanging_driver(tmp_path, 1.5), wait=False)
    # The driver sleeps an hour: an exit within the minute of this wait is serve's own bound,
    # however slowly a loaded machine starts the process (no timed assertion on top of it).
    assert server.process.wait(timeout=60) == 3
    failed = server.wait_for_event("driver_failed_to_start")
    assert failed and "start_timeout_s" in failed[0]["error"] and "1.5 s" in failed[0]["error"]
    assert not server.ready_path.exists()


def test_sigterm_while_the_driver_starts_is_a_clean_stop(serve, tmp_path: Path):
    """SIGTERM while the driver is still starting: serve stops at once with status 0."""
    server = serve(_hanging_driver(tmp_path, 600), wait=False)
    # The signal goes once the driver's constructor runs (serve's handlers are in place by
    # then), not after a fixed sleep that a busy machine's slow imports can outlast.
    deadline = time.monotonic() + 60
    while not (tmp_path / "driver-constructor-entered").exists() and time.monotonic() < deadline:
        time.sleep(0.05)
    server.process.send_signal(signal.SIGTERM)
    assert server.process.wait(timeout=STOP_TIMEOUT_S) == 0
    assert server.wait_for_event("driver_start_interrupted")


def test_port_in_use_exits_1(serve):
    """A second server on a bound port exits with status 1 and logs why."""
    first = serve()
    second = serve(EXAMPLE_DRIVER_TOML, bind=first.endpoint, wait=False, name="second")
    assert second.process.wait(timeout=60) == 1
    assert second.wait_for_event("server_bind_failed")


def test_curve_keys_from_driver_toml(serve, tmp_path: Path, keys: Keys):
    """CURVE keys named in [server] (relative to the file) admit the allowed client only."""
    config = _bad_copy(tmp_path, '# curve_secret_key_file = "keys/server.key_secret"',
                       'curve_secret_key_file = "server.key_secret"\ncurve_allowed_dir = "allowed"')
    shutil.copytree(keys.allowed_dir, config.parent / "allowed")
    shutil.copy(keys.server_secret, config.parent / "server.key_secret")
    server = serve(config)
    curve = CurveClientKeys.load(keys.client_secret, keys.server_public)
    with _client(server.endpoint, curve=curve) as client:
        assert client.status().shots_total == 0
    assert server.wait_for_event("server_listening")[0]["curve"] is True


def test_simulated_rig_calibrated_through_the_stark_map(serve, tmp_path: Path):
    """`autotune serve --config configs/sim-driver.toml` then `autotune calibrate`: every move goes
    through the Stark law, and the simulated electrodes end at V = gap sqrt(E_bias^2 + d/k)."""
    server = serve(SIM_DRIVER_TOML)
    data = tomllib.loads((REPO / "configs" / "dry-run.toml").read_text())
    data["bus"]["endpoint"] = server.endpoint
    data["search"].update(max_points=10, n_initial_points=5, min_points=5, refine_points=3)
    data["measurement"].update(shots_per_phase=600, verification_shots_per_phase=1500, resamples=300)
    data["calibration"]["store"] = str(tmp_path / "good.json")
    config = tmp_path / "calibrate.toml"
    config.write_text(_toml(data))
    run = tmp_path / "run"
    done = subprocess.run([sys.executable, "-m", "autotune.cli", "calibrate", "--config", str(config), "--out",
                           str(run)], capture_output=True, text=True, timeout=600, cwd=REPO,
                          stdin=subprocess.DEVNULL)
    assert done.returncode in (0, 4), done.stderr[-3000:]
    result = json.loads((run / "result.json").read_text())
    # truth searches the simulated rig's whole map for its best point: seconds of CPU, more
    # than the 5 s of the other requests on a loaded machine (it timed out twice in loaded
    # suites). A bound, not a measure.
    with _client(server.endpoint, timeout_s=120.0) as client:
        described = client.describe().setpoints["detuning"]
        in_force = client.status().setpoints["detuning"]
        hidden = client.truth()["hidden"]
    assert in_force == pytest.approx(result["setpoints"]["detuning"])
    assert hidden["electrode_voltage_v"] == pytest.approx(GAP * math.sqrt(BIAS**2 + in_force / K), rel=1e-9)
    # The described step is the 0.05 V channel step at the lowest voltage of +-150 kHz.
    assert described.max_step == pytest.approx(0.05 * 2 * abs(K) * GAP * math.sqrt(BIAS**2 + 150e3 / K) / GAP**2)




def test_readme_rig_command_serves_until_sigterm():
    """The README's `autotune rig --config configs/sim-rig.toml --bind tcp://127.0.0.1:PORT`, as written."""
    port = _free_port()
    command = "autotune rig --config configs/sim-rig.toml --bind tcp://127.0.0.1:PORT".replace("PORT", str(port))
    argv = _autotune_script() + command.split()[1:]
    process = subprocess.Popen(argv, cwd=REPO, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                               stderr=subprocess.PIPE)
    try:
        with _client(f"tcp://127.0.0.1:{port}") as client:
            # A bound for a loaded machine's start-up (imports alone take seconds), not a
            # measure of it.
            deadline = time.monotonic() + 120
            while True:
                try:
                    assert client.describe().rig == "bench-2-sim"
                    break
                except Exception:  # noqa: BLE001 - not listening yet
                    assert process.poll() is None and time.monotonic() < deadline
    finally:
        process.send_signal(signal.SIGTERM)
        _, err = process.communicate(timeout=STOP_TIMEOUT_S * 2)
    assert process.returncode == 0, err.decode()[-2000:]
    assert b"SIMULATED" in err


@pytest.mark.parametrize(("command", "options"), [
    ("rig", ["--config", "--bind", "--seed", "--ready-file", "--drop-probability", "--delay-s",
             "--corrupt-probability", "--exit-after", "--curve-secret-key", "--curve-allowed-dir", "--log-level"]),
    ("serve", ["--config", "--bind", "--ready-file", "--curve-secret-key", "--curve-allowed-dir", "--log-level"]),
    ("probe", ["ENDPOINT", "--yes", "--timeout-s", "--shots", "--curve-client-secret-key",
               "--curve-server-public-key"]),
])
def test_installed_script_shows_help(command: str, options: list[str]):
    """`autotune rig --help` (and serve, probe) through the installed console script: exit 0, every option."""
    done = subprocess.run(_autotune_script() + [command, "--help"], capture_output=True, text=True, timeout=60,
                          cwd=REPO, stdin=subprocess.DEVNULL)
    assert done.returncode == 0, done.stderr
    for option in options:
        assert option in done.stdout


def _driver_variant(tmp_path: Path, body: str, server_keys: str) -> Path:
    """The example driver's DRIVER.toml and package copied, its class replaced by a subclass of
    LabDriver written here (``body``: the class body), with ``server_keys`` in [server]."""
    config = _bad_copy(tmp_path, 'class = "lab_driver.driver:LabDriver"',
                       'class = "lab_driver.variant:Variant"')
    (config.parent / "variant.py").write_text(
        "import json, time\nfrom lab_driver.driver import LabDriver\n\n"
        "class Variant(LabDriver):\n" + body)
    text = config.read_text()
    for line in server_keys.splitlines():
        key = line.split("=")[0].strip()
        text, n = re.subn(rf"(?m)^{key} = .*$", line, text)
        assert n == 1, key
    config.write_text(text)
    return config


def _acquire_in_background(endpoint: str) -> None:
    """Send one acquire and let it go unanswered (the driver hangs in it)."""
    import threading

    def ask() -> None:
        try:
            with BusClient(endpoint, timeout_s=30.0, retries=0, backoff_s=0.1) as client:
                client.describe()
                client.acquire("empty", 0.0, 100)
        except Exception:  # noqa: BLE001 - no answer is what this test expects
            pass

    threading.Thread(target=ask, daemon=True).start()


def _hangs_in_acquire(marker: Path) -> str:
    """A class body whose acquire marks that it began, then never returns."""
    return ("    def acquire(self, field, ramsey_phase, shots):\n"
            f"        open({str(marker)!r}, 'w').close()\n"
            "        time.sleep(3600)\n")


def _wait_for(path: Path, timeout_s: float = 60.0) -> None:
    deadline = time.monotonic() + timeout_s
    while not path.exists():
        assert time.monotonic() < deadline, f"{path} did not appear within {timeout_s} s"
        time.sleep(0.05)


def test_a_driver_call_that_never_returns_bounds_the_stop(serve, tmp_path: Path):
    """SIGTERM while the driver hangs in acquire (an instrument that stopped answering and a
    library without a timeout): serve logs the call it waits for and, [server] stop_timeout_s
    later, what it abandons, and exits 3 (README: driver kit, exit codes)."""
    marker = tmp_path / "acquiring"
    server = serve(_driver_variant(tmp_path, _hangs_in_acquire(marker), "stop_timeout_s = 2.0"))
    _acquire_in_background(server.endpoint)
    _wait_for(marker)
    began = time.monotonic()
    server.process.send_signal(signal.SIGTERM)
    assert server.process.wait(timeout=60) == 3
    assert time.monotonic() - began >= 2.0
    requested = server.wait_for_event("stop_requested")
    assert requested and requested[0]["call_in_progress"].startswith("driver.acquire() running")
    forced = server.wait_for_event("stop_forced")
    assert forced and forced[0]["call_in_progress"].startswith("driver.acquire() running")
    assert "2 s after the signal" in forced[0]["reason"]


def test_a_second_signal_ends_a_stop_that_waits_for_the_driver(serve, tmp_path: Path):
    """With a long stop_timeout_s, a second SIGTERM (an operator's second Ctrl-C) ends the
    wait at once: exit 3, the abandoned call logged."""
    marker = tmp_path / "acquiring"
    server = serve(_driver_variant(tmp_path, _hangs_in_acquire(marker), "stop_timeout_s = 600.0"))
    _acquire_in_background(server.endpoint)
    _wait_for(marker)
    server.process.send_signal(signal.SIGTERM)
    assert server.wait_for_event("stop_requested", timeout_s=30)
    assert server.process.poll() is None
    server.process.send_signal(signal.SIGTERM)
    assert server.process.wait(timeout=60) == 3
    forced = server.wait_for_event("stop_forced")
    assert forced and forced[0]["reason"] == "a second signal"


def test_safe_on_stop_runs_the_drivers_safe_procedure(serve, tmp_path: Path):
    """[server] safe_on_stop = true: a stop (SIGTERM) calls the driver's safe procedure with the
    map's safe channel values before close (by default serve leaves the hardware as it is)."""
    record = tmp_path / "safe-calls.jsonl"
    body = ("    def safe(self, channels):\n"
            f"        with open({str(record)!r}, 'a') as f:\n"
            "            f.write(json.dumps(dict(channels)) + '\\n')\n"
            "        super().safe(channels)\n")

    def move_then_stop(folder: str, server_keys: str) -> Any:
        server = serve(_driver_variant(tmp_path / folder, body, server_keys), name=folder)
        with _client(server.endpoint) as client:
            client.describe()
            client.apply({"detuning": -10e3})
        server.process.send_signal(signal.SIGTERM)
        assert server.process.wait(timeout=60) == 0
        return server

    move_then_stop("default", "")
    assert not record.exists()
    server = move_then_stop("safe", "safe_on_stop = true")
    calls = [json.loads(line) for line in record.read_text().splitlines()]
    # The map's safe channel values (examples/lab_driver/DRIVER.toml): 3.0 V, 500 m/s / 4.49.
    assert calls == [{"STARK:HV1": 3.0, "VSEL:AOM_MHZ": pytest.approx(500.0 / 4.49)}]
    assert server.wait_for_event("safe_setpoints_applied")


def _times_out_twice_in_acquire() -> str:
    """A class body whose acquire guards each read of its instrument with SIGALRM (a common
    timeout of serial and GPIB libraries that have none): the first read times out, so does
    the retry, then the read succeeds. The alarms are the driver's own, not a stop."""
    return ("    def acquire(self, field, ramsey_phase, shots):\n"
            "        import signal\n"
            "        def late(signum, frame):\n"
            "            raise TimeoutError('instrument read')\n"
            "        previous = signal.signal(signal.SIGALRM, late)\n"
            "        try:\n"
            "            for _ in range(2):\n"
            "                try:\n"
            "                    signal.setitimer(signal.ITIMER_REAL, 0.01)\n"
            "                    time.sleep(3600)\n"
            "                except TimeoutError:\n"
            "                    pass\n"
            "        finally:\n"
            "            signal.setitimer(signal.ITIMER_REAL, 0)\n"
            "            signal.signal(signal.SIGALRM, previous)\n"
            "        return super().acquire(field, ramsey_phase, shots)\n")


def test_a_drivers_own_signals_are_not_taken_for_a_stop(serve, tmp_path: Path):
    """Only SIGINT and SIGTERM stop serve: a driver's own SIGALRM (its read timeouts, twice
    here) reaches the wake-up fd too but neither starts a stop nor counts as a second signal;
    the acquire is answered and a SIGTERM afterwards stops serve cleanly (exit 0)."""
    server = serve(_driver_variant(tmp_path, _times_out_twice_in_acquire(),
                                   "stop_timeout_s = 600.0"))
    with _client(server.endpoint) as client:
        client.describe()
        acquisition = client.acquire("empty", 0.0, 100)
        assert acquisition.shots == 100
        client.status()
    assert server.process.poll() is None
    server.process.send_signal(signal.SIGTERM)
    assert server.process.wait(timeout=60) == 0
    assert not server.wait_for_event("stop_forced")


def test_safe_on_stop_does_not_move_the_hardware_when_serve_never_listened(serve, tmp_path: Path):
    """A second serve of the same DRIVER.toml started by mistake on the port of one already
    serving exits 1 (README: the endpoint cannot be bound) without running the driver's safe
    procedure: it would move hardware the first server's client is working with."""
    record = tmp_path / "safe-calls.jsonl"
    body = ("    def safe(self, channels):\n"
            f"        with open({str(record)!r}, 'a') as f:\n"
            "            f.write(json.dumps(dict(channels)) + '\\n')\n"
            "        super().safe(channels)\n")
    config = _driver_variant(tmp_path, body, "safe_on_stop = true")
    first = serve(config, name="first")
    second = serve(config, name="second", bind=first.endpoint, wait=False)
    assert second.process.wait(timeout=60) == 1
    assert second.wait_for_event("server_bind_failed")
    assert not record.exists()
    first.process.send_signal(signal.SIGTERM)
    assert first.process.wait(timeout=60) == 0
    assert len(record.read_text().splitlines()) == 1  # the first one's own stop
