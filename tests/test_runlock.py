"""One owner per run folder: the folder's lock, with real processes, real sockets, real files."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest

from autotune.errors import RunFolderInUse
from autotune.run.journal import JOURNAL_NAME, RESULT_NAME, read_journal
from autotune.run.runlock import HOLDER_NAME, LOCK_NAME, RunLock, holder_if_running
from cli_helpers import autotune, start_autotune, tiny_config, wait_for_record
from rig_process import REPO, ServerProcess, spawn_server

_HOLD = """
import sys, time
from autotune.run.runlock import RunLock
lock = RunLock.acquire(sys.argv[1], "calibrate")
print("held", flush=True)
time.sleep(120)
"""


def _holding_process(run_dir: Path) -> subprocess.Popen[str]:
    """A process that takes the folder's lock and keeps it (until killed)."""
    process = subprocess.Popen([sys.executable, "-c", _HOLD, str(run_dir)], cwd=REPO,
                               stdout=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True)
    assert process.stdout is not None
    held = process.stdout.readline().strip()
    process.stdout.close()
    assert held == "held"
    return process


@pytest.fixture
def rig(tmp_path: Path) -> Any:
    server = spawn_server(tmp_path, "rig", seed=5)
    yield server
    server.stop()


def test_a_second_lock_on_a_folder_in_use_names_the_holder(tmp_path: Path) -> None:
    """While another process holds a folder, acquiring it is refused with its pid and host."""
    holder = _holding_process(tmp_path / "run")
    try:
        with pytest.raises(RunFolderInUse) as refused:
            RunLock.acquire(tmp_path / "run", "retune")
        assert f"process {holder.pid}" in str(refused.value)
        assert socket.gethostname() in str(refused.value)
        assert refused.value.holder["pid"] == holder.pid
        assert holder_if_running(tmp_path / "run")["pid"] == holder.pid
    finally:
        holder.kill()
        holder.wait(timeout=10)


def test_a_lock_left_by_a_killed_process_is_taken_over(tmp_path: Path) -> None:
    """The kernel drops the lock of a process killed with SIGKILL: the next command takes the
    folder without a question, and its holder file replaces the stale one."""
    holder = _holding_process(tmp_path / "run")
    holder.send_signal(signal.SIGKILL)
    holder.wait(timeout=10)
    assert json.loads((tmp_path / "run" / HOLDER_NAME).read_text())["pid"] == holder.pid
    assert holder_if_running(tmp_path / "run") is None
    with RunLock.acquire(tmp_path / "run", "calibrate") as lock:
        assert lock.holder["pid"] == os.getpid()
        assert json.loads((tmp_path / "run" / HOLDER_NAME).read_text())["pid"] == os.getpid()
    assert not (tmp_path / "run" / HOLDER_NAME).exists()


def test_a_lock_of_a_new_folder_that_nothing_wrote_leaves_no_folder(tmp_path: Path) -> None:
    """A command refused before its run began removes the folder its lock created."""
    RunLock.acquire(tmp_path / "new", "calibrate").release()
    assert not (tmp_path / "new").exists()


def test_a_second_command_on_a_running_folder_is_refused_and_the_first_ends_as_if_alone(
        tmp_path: Path, rig: ServerProcess) -> None:
    """While a calibration runs: its --resume, another calibrate --out and a retune into the
    same folder all exit 2 before connecting, naming the running process; report reads the
    folder and says the run is still going; the first run then ends accepted, with no
    mismatch, and its journal reads whole."""
    config = tiny_config(tmp_path / "c.toml", rig.endpoint, tmp_path / "good.json",
                         search={"max_points": 12, "min_points": 12})
    run = tmp_path / "run"
    first = start_autotune("calibrate", "--config", str(config), "--out", str(run), "--quiet")
    try:
        wait_for_record(run / JOURNAL_NAME, lambda r: r["type"] == "estimate", process=first)
        # Frozen mid-run (it keeps its lock, as a slow run would), so that the others are tried
        # while it runs, however fast the machine; it goes on afterwards.
        first.send_signal(signal.SIGSTOP)
        for argv in (["calibrate", "--config", str(config), "--resume", str(run)],
                     ["calibrate", "--config", str(config), "--out", str(run)],
                     ["retune", "--config", str(config), "--out", str(run)],
                     ["track", "--config", str(config), "--resume", str(run)]):
            refused = autotune(*argv, timeout=120)
            assert refused.returncode == 2, (argv, refused.stderr)
            assert f"process {first.pid}" in refused.stderr, refused.stderr
            assert "nothing was sent to the rig" in refused.stderr
            assert "CAUTION" not in refused.stderr  # printed only once a run is prepared
        report = autotune("report", str(run), "--no-plot", timeout=120)
        assert report.returncode == 0, report.stderr
        assert "the run is still going" in report.stdout and f"process {first.pid}" in report.stdout
        first.send_signal(signal.SIGCONT)
        out, err = first.communicate(timeout=600)
    finally:
        if first.poll() is None:
            first.send_signal(signal.SIGCONT)
            first.kill()
            first.communicate(timeout=10)
    assert first.returncode == 0, err[-3000:]
    records = read_journal(run / JOURNAL_NAME)
    assert records[-1]["type"] == "end" and records[-1]["status"] == "accepted"
    assert not [r for r in records if r["type"] == "decision" and r.get("what") == "abort"]
    assert "rig_mismatch" not in (run / "log.jsonl").read_text()
    assert json.loads((run / RESULT_NAME).read_text())["accepted"]
    assert not (run / HOLDER_NAME).exists() and (run / LOCK_NAME).exists()
    assert "still going" not in autotune("report", str(run), "--no-plot", timeout=120).stdout


def test_a_second_dry_run_into_the_same_folder_is_refused(tmp_path: Path) -> None:
    """dry-run holds its folder too: a second one into it exits 2 naming the first."""
    out = tmp_path / "dry"
    holder = _holding_process(out)
    try:
        refused = autotune("dry-run", "--out", str(out), timeout=120)
    finally:
        holder.kill()
        holder.wait(timeout=10)
    assert refused.returncode == 2, refused.stderr
    assert f"process {holder.pid}" in refused.stderr and "in use" in refused.stderr
    assert not (out / "rig.log").exists()  # no rig was started


def _raw(endpoint: str, op: str, client: str, args: dict[str, Any]) -> dict[str, Any]:
    """One request as another client sends it (claimed by hand: never renewed)."""
    import zmq

    from autotune.wire import protocol

    with zmq.Context() as context, context.socket(zmq.REQ) as raw:
        raw.setsockopt(zmq.LINGER, 0)
        raw.setsockopt(zmq.RCVTIMEO, 10_000)
        raw.connect(endpoint)
        msg_id = protocol.new_msg_id()
        raw.send(protocol.encode_request(protocol.Op(op), args, msg_id, client=client))
        return protocol.decode_reply(raw.recv(), msg_id)


def test_a_rig_leased_to_another_client_is_refused_or_waited_for(tmp_path: Path,
                                                                  rig: ServerProcess) -> None:
    """A calibration on a rig another client holds exits 3 naming it, with no run folder and
    nothing moved; with --wait-lease-s it waits until the holder releases, then runs."""
    config = tiny_config(tmp_path / "c.toml", rig.endpoint, tmp_path / "good.json")
    carol = "carol@bench pid 77 (retune)"
    _raw(rig.endpoint, "claim", carol, {"ttl_s": 600.0})
    refused = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "a"),
                       timeout=120)
    assert refused.returncode == 3, refused.stderr[-3000:]
    assert f"rig leased by {carol}" in refused.stderr
    assert "--wait-lease-s" in refused.stderr and "CAUTION" not in refused.stderr
    assert not (tmp_path / "a").exists()
    err = tmp_path / "waiting.err"
    with err.open("w") as stream:
        waiting = start_autotune("calibrate", "--config", str(config), "--out",
                                 str(tmp_path / "b"), "--wait-lease-s", "300", output=stream)
        try:
            deadline = time.monotonic() + 120
            while "waiting_for_lease" not in err.read_text() and time.monotonic() < deadline:
                assert waiting.poll() is None, err.read_text()
                time.sleep(0.1)
            assert "waiting_for_lease" in err.read_text()
            assert _raw(rig.endpoint, "release", carol, {}) == {"released": True}
            assert waiting.wait(timeout=600) == 0, err.read_text()[-3000:]
        finally:
            if waiting.poll() is None:
                waiting.kill()
                waiting.wait(timeout=10)
    claims = [e["client"] for e in rig.events() if e.get("event") == "lease_claimed"]
    assert claims[0] == carol and claims[-1] != carol and "(calibrate)" in claims[-1]
    assert rig.wait_for_event("lease_released")
