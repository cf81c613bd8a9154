"""End-to-end tests of the ``autotune`` command: real processes, real ZeroMQ sockets, real files.

The simulated rig's noiseless truth (read over the bus with the ``truth`` op) is the outside
reference for the quality of what a run chose.
"""

from __future__ import annotations

import functools
import json
import re
import signal
import socket
import subprocess
import sys
import time
import tomllib
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from autotune.wire.bus import BusClient
from autotune.run.journal import JOURNAL_NAME, RESULT_NAME, read_journal
from rig_process import REPO, ServerProcess

from cli_helpers import DRY_RUN, DryRun
from cli_helpers import autotune as _autotune
from cli_helpers import to_toml as _to_toml
from cli_helpers import wait_for_records
from cli_helpers import write_config as _write_config


@pytest.fixture
def rig_server(servers: Callable[..., ServerProcess]) -> Callable[..., ServerProcess]:
    """Factory of simulated rig processes seeded 11 unless told (tests/conftest.py's
    ``servers``), all stopped at teardown."""
    return functools.partial(servers, seed=11)


def _client(endpoint: str) -> BusClient:
    return BusClient(endpoint, timeout_s=5.0, retries=2, backoff_s=0.1)


def _start_calibration(tmp_path: Path, server: ServerProcess, output: int
                       ) -> tuple[Path, Path, subprocess.Popen[str]]:
    """A calibrate process against ``server`` in the background: (config, run folder, process)."""
    config = _write_config(tmp_path / "c.toml", server.endpoint,
                           calibration={"store": str(tmp_path / "good.json")})
    run = tmp_path / "run"
    process = subprocess.Popen([sys.executable, "-m", "autotune.cli", "calibrate", "--config",
                                str(config), "--out", str(run)], cwd=REPO,
                               stdin=subprocess.DEVNULL, stdout=output, stderr=output, text=True)
    return config, run, process


def _wait_for(path: Path, kind: str, count: int, timeout_s: float = 300.0) -> None:
    wait_for_records(path, kind, count, timeout_s)


def test_dry_run_finds_the_true_optimum_and_retunes_cheaply(readme_dry_run: DryRun) -> None:
    """dry-run: both stages reach >= 0.98 of the true best and are accepted; the retune costs
    less than the calibration, and the calibration no more than 3.5 times its own verification
    (the oracle floor of the study: verification alone at the true best)."""
    done = readme_dry_run  # the session's one README dry run (conftest.py)
    assert done.returncode == 0 and done.folder is not None, done.stderr[-3000:]
    out = done.folder
    assert "SIMULATED" in done.stderr and "CAUTION" in done.stderr
    results = {name: json.loads((out / name / RESULT_NAME).read_text())
               for name in ("calibrate", "retune")}
    for name, result in results.items():
        truth = result["truth"]
        assert set(truth) == {"inversion_at_chosen", "best_inversion", "best_setpoints"}
        # Reference: the simulated rig's noiseless truth at the end of the stage.
        assert truth["inversion_at_chosen"] >= 0.98 * truth["best_inversion"], name
        # The global optimum, not the detuned ridge of slower atoms (docs/physics.md s.2): the
        # chosen detuning sits within the few-kHz tolerance of the best one.
        assert abs(result["setpoints"]["detuning"] - truth["best_setpoints"]["detuning"]) < 6e3
        assert result["accepted"]
    assert results["retune"]["shots"] < results["calibrate"]["shots"]
    floor = 2 * 6 * tomllib.loads(DRY_RUN.read_text())["measurement"]["verification_shots_per_phase"]
    # Choosing the velocity on the inversion itself (issue 18) costs more than the absorption
    # alone did: 163k-230k shots on the demo seeds 1-5 (2.3-3.2x the floor), above the issue's
    # 2x benchmark target, which the study reports; here only a gross regression fails.
    assert results["calibrate"]["shots"] <= 3.5 * floor
    assert "true best" in done.stdout


def test_report_summarises_a_run_folder_and_track_holds_from_it(tmp_path: Path,
                                                                  rig_server: Any) -> None:
    """report: a summary of every point and a PNG figure; track: one run folder for a night of
    an hour of rig time, held from the calibration just accepted, its summary line printed."""
    server = rig_server()
    config = _write_config(tmp_path / "c.toml", server.endpoint,
                           search={"max_points": 6, "min_points": 6, "n_initial_points": 4},
                           calibration={"store": str(tmp_path / "good.json")},
                           # Six points cannot bound the shortfall: a test of the mechanics.
                           acceptance={"max_shortfall": 1.0},
                           track={"max_rig_time_s": 3600.0})
    run = tmp_path / "run"
    done = _autotune("calibrate", "--config", str(config), "--out", str(run))
    assert done.returncode == 0, done.stderr[-3000:]
    shown = _autotune("report", str(run))
    assert shown.returncode == 0, shown.stderr
    # One table line per measurement: label, step number, set-points, inversion, ...
    table = re.findall(r"^(\w+) +(\d+) +[\d.]+ +-?[\d.]+ ", shown.stdout, flags=re.M)
    estimates = [(r["label"], r["point"]) for r in read_journal(run / JOURNAL_NAME)
                 if r["type"] == "estimate"]
    assert [(label, int(n)) for label, n in table] == estimates
    png = run / "report.png"
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec, ISO/IEC 15948)
    # Holding the condition from the calibration just accepted: one folder for the night.
    night = tmp_path / "night"
    tracked = _autotune("track", "--config", str(config), "--out", str(night))
    assert tracked.returncode == 0, tracked.stderr[-3000:]
    assert (night / JOURNAL_NAME).exists() and (night / RESULT_NAME).exists()
    assert tracked.stdout.startswith("track: ended (end of the night: 1.00 h of rig time")
    assert f"run folder: {night}" in tracked.stdout
    assert "CAUTION" in tracked.stderr
    # Piped: plain progress lines of the night's retune and of its checks.
    assert re.search(r"^progress: retune step ", tracked.stderr, flags=re.M), tracked.stderr[-2000:]
    assert re.search(r"^progress: night \d+\.\d/1\.0 h \| held ", tracked.stderr, flags=re.M)


@pytest.mark.parametrize("flags", [["--interval-s", "60"], ["--cycles", "2"]])
def test_track_refuses_the_options_of_its_schedule(tmp_path: Path, flags: list[str]) -> None:
    """The schedule-based track's --interval-s and --cycles are refused with exit 2 and a
    message naming what replaced them, before any connection."""
    config = _write_config(tmp_path / "c.toml", "tcp://127.0.0.1:9",
                           calibration={"store": str(tmp_path / "good.json")})
    done = _autotune("track", "--config", str(config), *flags, "--out", str(tmp_path / "night"),
                     timeout=60)
    assert done.returncode == 2
    assert "--interval-s and --cycles were removed" in done.stderr
    assert "max_rig_time_s" in done.stderr
    assert not (tmp_path / "night").exists()


def test_calibrate_killed_and_resumed_loses_and_repeats_nothing(tmp_path: Path,
                                                                rig_server: Any) -> None:
    """SIGKILL mid-run, then --resume: a complete journal, no step repeated, a good result."""
    server = rig_server()
    config, run, process = _start_calibration(tmp_path, server, subprocess.DEVNULL)
    try:
        _wait_for(run / JOURNAL_NAME, "estimate", 4)
        process.send_signal(signal.SIGKILL)
        process.wait(timeout=30)
    finally:
        if process.poll() is None:
            process.kill()
    killed_at = len(read_journal(run / JOURNAL_NAME))
    resumed = _autotune("calibrate", "--config", str(config), "--resume", str(run))
    assert resumed.returncode == 0, resumed.stderr[-3000:]
    records = read_journal(run / JOURNAL_NAME)
    assert len(records) > killed_at
    assert records[-1]["type"] == "end" and records[-1]["status"] == "accepted"
    estimates = [(r["label"], r["point"]) for r in records if r["type"] == "estimate"]
    assert len(estimates) == len(set(estimates))
    acquisitions = [(r["label"], r["point"], r["field"], r["phase_index"])
                    for r in records if r["type"] == "acquisition"]
    assert len(acquisitions) == len(set(acquisitions))
    result = json.loads((run / RESULT_NAME).read_text())
    assert result["points"] == sum(label not in ("check", "verify", "correct")
                                   for label, _ in estimates)
    # No shot lost or counted twice: the journal's shots are the result's and the rig's (an
    # acquisition cut by the kill was written ahead and asked for again by its msg_id).
    shots = sum(r["shots"] for r in records if r["type"] == "acquisition")
    assert result["shots"] == shots
    with _client(server.endpoint) as rig:
        truth = rig.truth(result["setpoints"])
        assert rig.status().shots_total == shots
    # As good as an uninterrupted run: the kill lands at a moment set by timing, so this run's
    # noise realisation is not reproducible and the bar is the spread of uninterrupted
    # calibrations (0.957-1.000 of the true best over the benchmark's 20 scenarios, 0.961-0.999
    # over dry-run seeds 1-8; README), not the 0.97 of one fixed seed (the dry-run test's).
    assert truth["inversion"] >= 0.95 * truth["best"]["inversion"]


def test_sigterm_sends_the_rig_to_safe_setpoints_and_closes_the_journal(
        tmp_path: Path, rig_server: Any) -> None:
    """SIGTERM mid-run: exit code 130, safe set-points applied on the rig, journal ended."""
    server = rig_server()
    config, run, process = _start_calibration(tmp_path, server, subprocess.PIPE)
    try:
        _wait_for(run / JOURNAL_NAME, "estimate", 2)
        process.send_signal(signal.SIGTERM)
        _, err = process.communicate(timeout=60)
    finally:
        if process.poll() is None:
            process.kill()
    assert process.returncode == 130, err[-2000:]
    assert "safe set-points" in err
    records = read_journal(run / JOURNAL_NAME)
    assert records[-1]["type"] == "end" and records[-1]["status"] == "interrupted"
    assert any(r["type"] == "safe" for r in records)
    with _client(server.endpoint) as rig:
        assert rig.status().setpoints == rig.describe().safe_setpoints
    assert not (tmp_path / "good.json").exists()


def test_a_box_that_excludes_the_optimum_exits_4_with_one_reason_and_keeps_the_last_good(
        tmp_path: Path, rig_server: Any) -> None:
    """calibrate in a velocity box below the rig's best (nominal 2 pi velocity inside it): the
    stage is not accepted (exit 4), one line says why and what to check, result.json carries the
    predicted shortfall as numbers, the last good store is untouched and the rig is left at its
    safe set-points ([acceptance] on_reject = "safe")."""
    server = rig_server()
    store = tmp_path / "good.json"
    store.write_text('{"kept": true}')
    # 45 kHz and 5.8 mm put the nominal 2 pi velocity at 462.6 m/s, inside 400-470 m/s; the
    # simulated rig's best lies near 517 m/s (its truth, read below).
    config = _write_config(tmp_path / "c.toml", server.endpoint,
                           setpoints={"velocity": {"search_min": 400.0, "search_max": 470.0}},
                           nominal={"coupling_hz": 45e3},
                           calibration={"store": str(store)})
    run = tmp_path / "run"
    done = _autotune("--log-level", "warning", "calibrate", "--config", str(config),
                     "--out", str(run))
    assert done.returncode == 4, done.stderr[-3000:]
    reasons = [line for line in done.stdout.splitlines()
               if line.startswith("calibrate: not accepted: ")]
    assert len(reasons) == 1, done.stdout
    assert "box" in reasons[0] and "check" in reasons[0]
    result = json.loads((run / RESULT_NAME).read_text())
    assert not result["accepted"] and result["reason"] == reasons[0][len("calibrate: "):]
    bound = result["predicted_shortfall"]
    assert set(bound) >= {"estimate", "upper", "confidence"} and bound["confidence"] == 0.95
    assert json.loads(store.read_text()) == {"kept": True}
    with _client(server.endpoint) as rig:
        best = rig.truth()["best"]["setpoints"]["velocity"]
        assert best > 470.0
        assert rig.status().setpoints == rig.describe().safe_setpoints


@pytest.mark.parametrize(("change", "fragment"), [
    ({"measurement": {"shots_per_phase": -5}}, "measurement.shots_per_phase"),
    ({"search": {"strategy": "simplex"}}, "search.strategy"),
    ({"setpoints": {"velocity": {"max_step": 0}}}, "setpoints.velocity.max_step"),
])
def test_bad_config_exits_2_naming_the_key_and_writes_nothing(tmp_path: Path, change: dict,
                                                              fragment: str) -> None:
    """A wrong value: exit code 2, the key in the message, no run folder."""
    data = tomllib.loads(DRY_RUN.read_text())
    for section, values in change.items():
        for key, value in values.items():
            if isinstance(value, dict):
                data[section][key].update(value)
            else:
                data[section][key] = value
    config = tmp_path / "bad.toml"
    config.write_text(_to_toml(data))
    done = _autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"),
                     timeout=60)
    assert done.returncode == 2
    assert fragment in done.stderr
    assert not (tmp_path / "run").exists()


def test_missing_files_exit_2(tmp_path: Path) -> None:
    """A missing config, or a retune with no last good calibration: exit code 2, a clear message."""
    done = _autotune("calibrate", "--config", str(tmp_path / "none.toml"), timeout=60)
    assert done.returncode == 2 and "no such file" in done.stderr
    config = _write_config(tmp_path / "c.toml", "tcp://127.0.0.1:9",
                           calibration={"store": str(tmp_path / "absent.json")})
    done = _autotune("retune", "--config", str(config), "--out", str(tmp_path / "run"),
                     timeout=60)
    assert done.returncode == 2
    assert "absent.json" in done.stderr and "last good calibration" in done.stderr


def test_unreachable_rig_exits_3_within_its_bound(tmp_path: Path) -> None:
    """No rig listening: exit code 3 after the bounded retries, never a hang."""
    with socket.socket() as probe:  # a free loopback port nobody listens on
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    config = _write_config(tmp_path / "c.toml", f"tcp://127.0.0.1:{port}",
                           bus={"timeout_s": 0.3, "retries": 1, "backoff_s": 0.05},
                           calibration={"store": str(tmp_path / "good.json")})
    start = time.monotonic()
    done = _autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"),
                     timeout=120)
    assert done.returncode == 3, done.stderr[-2000:]
    assert "rig error" in done.stderr
    assert "check that the rig's server is running and listening at the config's [bus] " \
           "endpoint" in done.stderr
    # Bound: (1 + [recovery] step_retries) times the bus's (1 + retries) * timeout + backoff,
    # with retry_wait_s between, plus interpreter start-up on a busy machine.
    assert time.monotonic() - start < 60
    assert not (tmp_path / "run" / JOURNAL_NAME).exists()


def test_help_shows_the_caution_and_every_command() -> None:
    """--help lists the commands and the safety caution (common practice for rig-facing tools)."""
    done = _autotune("--help", timeout=60)
    assert done.returncode == 0
    for command in ("rig", "calibrate", "retune", "dry-run", "report", "track"):
        assert command in done.stdout
    assert "interlocks" in done.stdout
