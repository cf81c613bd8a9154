"""Bad input refused as users meet it: real ``autotune`` processes, real files, a real rig.

Every case exits 2 with one sentence naming the file (and key), no traceback, no run folder,
and the rig (a simulated rig process listening all along) untouched: its shots, set-points and
clock are what they were (README: configuration; issue 18 item 4, issue 23 item 6).
"""

from __future__ import annotations

import json
import os
import tomllib
from pathlib import Path
from typing import Any

import pytest

from autotune.run.runlock import HOLDER_NAME, LOCK_NAME

from autotune.wire.bus import BusClient
from autotune.run.journal import JOURNAL_NAME, MANIFEST_NAME
from cli_helpers import autotune, tiny_config, to_toml
from rig_process import REPO, spawn_server

SIM_RIG = REPO / "configs" / "sim-rig.toml"
SIM_DRIVER = REPO / "configs" / "sim-driver.toml"
#: Bytes that are not UTF-8 text (0xff never starts a UTF-8 sequence), with a NUL.
GARBAGE = b"\xff\xfe\x00\x81 not a config \x9c\xd0\n" + bytes(range(128, 256))


#: The tests that read the module-scoped fixture run on one worker (pytest-xdist's
#: loadgroup), so that it is built once; the others go to any worker.
_SHARES_FIXTURE = pytest.mark.xdist_group("test_input_checks")


@pytest.fixture(scope="module")
def rig(tmp_path_factory: pytest.TempPathFactory) -> Any:
    """One simulated rig process listening for the whole module; every test checks that its
    refusal left it untouched."""
    server = spawn_server(tmp_path_factory.mktemp("rig"), "untouched")
    yield server
    server.stop()


def _state(endpoint: str) -> tuple[int, dict[str, float], float]:
    with BusClient(endpoint, timeout_s=3.0, retries=8, backoff_s=0.05) as client:
        status = client.status()
    return status.shots_total, dict(status.setpoints), status.clock


def _refused(done: Any, *fragments: str) -> None:
    """Exit 2, each fragment in stderr, no traceback."""
    assert done.returncode == 2, done.stderr[-3000:]
    for fragment in fragments:
        assert fragment in done.stderr, (fragment, done.stderr[-3000:])
    assert "Traceback" not in done.stderr


def _config(tmp_path: Path, endpoint: str, **sections: dict[str, Any]) -> Path:
    return tiny_config(tmp_path / "c.toml", endpoint, tmp_path / "store" / "good.json",
                       **sections)


@_SHARES_FIXTURE
def test_a_config_of_binary_garbage_is_refused_naming_the_file(tmp_path, rig):
    """calibrate, retune and track with a config that is not UTF-8 text: exit 2 naming the file
    (it used to exit 1 with a UnicodeDecodeError traceback), no run folder, rig untouched."""
    config = tmp_path / "garbage.toml"
    config.write_bytes(GARBAGE)
    before = _state(rig.endpoint)
    for command in ("calibrate", "retune", "track"):
        done = autotune(command, "--config", str(config), "--out", str(tmp_path / command))
        _refused(done, f"autotune: {config}: <file>: expected a TOML file (UTF-8 text), got "
                       "'bytes that are not UTF-8 text (invalid start byte at byte 0)'")
        assert not (tmp_path / command).exists()
    assert _state(rig.endpoint) == before


@_SHARES_FIXTURE
def test_a_coupling_typed_in_khz_is_refused_before_anything_moves(tmp_path, rig):
    """[nominal] coupling_hz = 49 (kHz typed where Hz is asked; issue 18 ran a whole night on
    it): exit 2 naming both nominal keys, the 2π velocity they give and the likely unit; no run
    folder; nothing sent to the rig."""
    config = _config(tmp_path, rig.endpoint, nominal={"coupling_hz": 49})
    before = _state(rig.endpoint)
    done = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"))
    _refused(done, "2 problems, nothing was sent to the rig",
             f"{config}: nominal.coupling_hz: expected a value from 1000 to 500000 Hz (vacuum "
             "Rabi frequencies of microwave cavity QED with Rydberg atoms are tens of kHz), got "
             "49: did you mean 49 kHz = 49000?",
             f"{config}: nominal.coupling_hz/waist_m: expected a nominal 2π velocity",
             "within the velocity search box [460, 560] m/s", "got 0.5037 m/s")
    assert not (tmp_path / "run").exists()
    assert _state(rig.endpoint) == before


@_SHARES_FIXTURE
def test_a_nominal_two_pi_velocity_outside_the_box_is_refused(tmp_path, rig):
    """A plausible coupling and waist whose 2π velocity (Ω0 w / (2√π) = 411.2 m/s for 40 kHz
    and 5.8 mm, docs/physics.md section 2) lies below the box [460, 560]: exit 2 naming both keys and
    the velocity, no run folder, rig untouched."""
    config = _config(tmp_path, rig.endpoint, nominal={"coupling_hz": 40e3})
    before = _state(rig.endpoint)
    done = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"))
    _refused(done, f"{config}: nominal.coupling_hz/waist_m:", "got 411.2 m/s: the 2π velocity "
             "of coupling_hz = 40000 Hz and waist_m = 0.0058 m; check both and the box")
    assert not (tmp_path / "run").exists()
    assert _state(rig.endpoint) == before


@_SHARES_FIXTURE
def test_absurd_budgets_are_refused_naming_key_bound_and_why(tmp_path, rig):
    """max_shots = 1e26 (issue 23: accepted, the progress line showed 0/99999999999999991611392k)
    and a search of 100 years: one message with both, exit 2, rig untouched."""
    config = _config(tmp_path, rig.endpoint)
    text = config.read_text(encoding="utf-8")
    data = tomllib.loads(text)
    data["search"]["max_rig_time_s"] = 3.2e9
    config.write_text(to_toml(data).replace(
        f"max_shots = {data['search']['max_shots']}", "max_shots = 99999999999999999999999999"))
    before = _state(rig.endpoint)
    done = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"))
    _refused(done, "2 problems",
             f"{config}: search.max_shots: expected an integer >= 1 and <= 1000000000 (1e9 shots "
             "are 77 days of beam at 150 shots per second: no budget a lab means), got "
             "99999999999999999999999999",
             f"{config}: search.max_rig_time_s: expected a finite number > 0 and <= 2.592e+06 "
             "(30 days")
    assert not (tmp_path / "run").exists()
    assert _state(rig.endpoint) == before


@_SHARES_FIXTURE
def test_a_damaged_last_good_store_stops_a_retune_naming_it(tmp_path, rig):
    """retune with a last good store of garbage bytes: exit 2 naming the store, no run folder,
    nothing sent to the rig."""
    config = _config(tmp_path, rig.endpoint)
    store = tmp_path / "store" / "good.json"
    store.parent.mkdir()
    store.write_bytes(GARBAGE)
    before = _state(rig.endpoint)
    done = autotune("retune", "--config", str(config), "--out", str(tmp_path / "run"))
    _refused(done, f"autotune: {store}: <file>: expected a last good calibration written by "
                   f"'autotune calibrate'", "not readable JSON")
    assert not (tmp_path / "run").exists()
    assert _state(rig.endpoint) == before


@_SHARES_FIXTURE
@pytest.mark.parametrize("damaged", [JOURNAL_NAME, MANIFEST_NAME])
def test_a_damaged_run_folder_is_refused_on_resume_and_report(tmp_path, rig, damaged):
    """A resume of a folder whose journal or manifest is garbage: exit 2 naming the file, the
    folder left as it was, nothing sent to the rig; report refuses a garbage manifest and reads
    a garbage journal up to its damage, naming it."""
    config = _config(tmp_path, rig.endpoint)
    run = tmp_path / "run"
    run.mkdir()
    (run / MANIFEST_NAME).write_text(json.dumps({"command": "calibrate"}), encoding="utf-8")
    (run / JOURNAL_NAME).write_text("", encoding="utf-8")
    (run / damaged).write_bytes(GARBAGE + b"\n")
    listing = sorted(os.listdir(run))
    before = _state(rig.endpoint)
    done = autotune("calibrate", "--config", str(config), "--resume", str(run))
    _refused(done, f"{run / damaged}")
    report = autotune("report", str(run), "--no-plot")
    if damaged == JOURNAL_NAME:
        # A damaged journal is read up to its damage, which report names (issue 19).
        assert report.returncode == 0, report.stderr
        assert f"{run / damaged}" in report.stdout + report.stderr
    else:
        _refused(report, f"{run / damaged}")
    # The refused resume may leave its (empty) lock file: the run folder's lock (issue 19).
    assert sorted(set(os.listdir(run)) - {LOCK_NAME, HOLDER_NAME}) == listing
    assert _state(rig.endpoint) == before


def test_a_thermal_step_typed_in_khz_is_refused(tmp_path):
    """dry-run --thermal-step-hz 15 (meant as kHz; issue 18: taken silently as a step of
    0.0 kHz): exit 2 with the hint, before the simulated rig starts or a folder is made."""
    done = autotune("dry-run", "--thermal-step-hz", "15", "--out", str(tmp_path / "dry"))
    _refused(done, "argument --thermal-step-hz: expected a size from 100 to 1e+07 Hz, either "
                   "sign, or 0 (a thermal step of the cavity is kHz to tens of kHz), got 15: "
                   "did you mean 15 kHz = 15000?")
    assert not (tmp_path / "dry").exists()


def test_a_bad_simulated_rig_config_stops_the_dry_run_before_its_folder(tmp_path):
    """dry-run --rig-config with garbage bytes, and with a damping time typed in ms: exit 2
    naming the file (and key, with the unit hint), no dry-run folder."""
    garbage = tmp_path / "garbage.toml"
    garbage.write_bytes(GARBAGE)
    done = autotune("dry-run", "--rig-config", str(garbage), "--out", str(tmp_path / "dry"))
    _refused(done, f"autotune: {garbage}: <file>: expected a TOML file (UTF-8 text), got "
                   "'bytes that are not UTF-8 text")
    assert not (tmp_path / "dry").exists()
    slipped = tmp_path / "sim.toml"
    slipped.write_text(SIM_RIG.read_text(encoding="utf-8").replace(
        "damping_time_s = 0.025", "damping_time_s = 25"), encoding="utf-8")
    done = autotune("dry-run", "--rig-config", str(slipped), "--out", str(tmp_path / "dry"))
    _refused(done, f"{slipped}: cavity.damping_time_s: expected a value from 1e-06 to 10 s",
             "got 25: did you mean 25 ms = 0.025?")
    assert not (tmp_path / "dry").exists()


def test_serve_refuses_a_channel_limit_of_1e308_and_a_garbage_rig_config(tmp_path):
    """autotune serve with channel_limit_max = 1e308 in DRIVER.toml (issue 23: accepted), and
    with a simulated-rig config of garbage bytes: exit 2 naming the file, the key and the bound;
    nothing listens."""
    (tmp_path / "sim-rig.toml").write_bytes(SIM_RIG.read_bytes())
    driver = tmp_path / "DRIVER.toml"
    driver.write_text(SIM_DRIVER.read_text(encoding="utf-8").replace(
        "channel_max_step = 0.05", "channel_max_step = 0.05\nchannel_limit_max = 1e308"),
        encoding="utf-8")
    done = autotune("serve", "--config", str(driver), "--bind", "tcp://127.0.0.1:0")
    _refused(done, f"{driver}: setpoints.detuning.channel_limit_max: expected a value within "
                   "+-100000 V (electrode and detector voltages are volts to kV), got 1e+308")
    assert "server_listening" not in done.stderr
    (tmp_path / "sim-rig.toml").write_bytes(GARBAGE)
    driver.write_text(SIM_DRIVER.read_text(encoding="utf-8"), encoding="utf-8")
    done = autotune("serve", "--config", str(driver), "--bind", "tcp://127.0.0.1:0")
    _refused(done, f"{tmp_path / 'sim-rig.toml'}: <file>: expected a TOML file (UTF-8 text)")
    assert "server_listening" not in done.stderr


@_SHARES_FIXTURE
def test_garbage_key_files_stop_the_run_naming_the_file(tmp_path, rig):
    """[bus.curve] key files of garbage bytes: exit 2 naming the key file (security fails
    loudly, never a fallback to plain text), no run folder, nothing sent to the rig."""
    for name in ("client.key_secret", "rig.key"):
        (tmp_path / name).write_bytes(GARBAGE)
    config = _config(tmp_path, rig.endpoint,
                     bus={"curve": {"client_secret_key_file": str(tmp_path / "client.key_secret"),
                                    "server_public_key_file": str(tmp_path / "rig.key")}})
    before = _state(rig.endpoint)
    done = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"))
    _refused(done, f"{tmp_path / 'client.key_secret'}: curve.client_secret_file: expected a "
                   "readable ZeroMQ certificate file")
    assert not (tmp_path / "run").exists()
    assert _state(rig.endpoint) == before


def test_rig_refuses_a_garbage_config_and_an_absurd_delay(tmp_path):
    """autotune rig with a config of garbage bytes, and with a reply delay of a year: exit 2
    naming the file or the flag; nothing listens."""
    garbage = tmp_path / "garbage.toml"
    garbage.write_bytes(GARBAGE)
    done = autotune("rig", "--config", str(garbage), "--bind", "tcp://127.0.0.1:0")
    _refused(done, f"{garbage}: <file>: expected a TOML file (UTF-8 text)")
    assert "server_listening" not in done.stderr
    done = autotune("rig", "--bind", "tcp://127.0.0.1:0", "--delay-s", "3.2e7")
    _refused(done, "<flags>: delay_reply_s: expected a number of seconds from 0 to 600")
    assert "server_listening" not in done.stderr
