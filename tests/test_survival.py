"""A night that survives anything, through real processes, real sockets and real files.

- Kill and resume: SIGKILL, SIGINT or SIGTERM after each record kind of calibrate, retune and
  track (a night: after a check, after a correction, during a retune inside the night after a
  thermal step, between checks); the resume command the stop message names finishes the run;
  the journal keeps its invariants (tests/journal_checks.py: write-ahead logging, at-least-once
  delivery with idempotent receivers) and accounts for every shot the rig counted. A SIGINT or
  SIGTERM that lands after the stage's last operation lets it end as it would have; that end is
  checked the same way.
- A rig restarted on the same endpoint between acquisitions is noticed and nothing it
  measured at other set-points is filed.
- Under heavy fault injection (drop 0.3, delay 0.3 s, corrupt 0.2) every shot the rig reports
  is in the journal: one msg_id per logical operation across every retry.
- A bad run is refused before the first move, with every problem at once and no run folder.
- Stop messages say what happened to the rig.
"""

from __future__ import annotations

import os
import shlex
import signal
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from autotune.wire.bus import BusClient
from autotune.run.journal import JOURNAL_NAME, RESULT_NAME, read_journal, read_json
from cli_helpers import autotune, start_autotune, tiny_config, wait_for_record
from journal_checks import check_invariants, journal_shots
from rig_process import REPO, ServerProcess, spawn_server

SIGNALS = (signal.SIGKILL, signal.SIGINT, signal.SIGTERM)


def _client(endpoint: str) -> BusClient:
    return BusClient(endpoint, timeout_s=3.0, retries=8, backoff_s=0.05)


def _rig_shots(endpoint: str) -> int:
    with _client(endpoint) as rig:
        return rig.status().shots_total


def _matcher(spec: str) -> Callable[[dict[str, Any]], bool]:
    """``kind``, ``kind:label`` (measurements, estimates) or ``decision:what``; ``a|b`` for
    either of two labels; for a night, ``between_checks`` (a wait after the first check) and
    ``night_retune`` (a retune begun inside the night)."""
    if spec == "between_checks":
        return lambda r: r["type"] == "wait" and r.get("point", 0) >= 1
    if spec == "night_retune":
        return lambda r: r["type"] == "decision" and r["what"] == "retune" and r["index"] >= 1
    kind, _, detail = spec.partition(":")

    def match(record: dict[str, Any]) -> bool:
        if record["type"] != kind:
            return False
        if not detail:
            return True
        wanted = detail.split("|")
        return record.get("what" if kind == "decision" else "label") in wanted

    return match


def _journals(run: Path) -> list[Path]:
    return [run / JOURNAL_NAME] if (run / JOURNAL_NAME).exists() else []


#: A night of three hours of rig time at the tiny sizes (a retune's check and verification at
#: 400 shots per phase).
NIGHT = {"track": {"max_rig_time_s": 3 * 3600.0, "retune_shots_per_phase": 400}}


def _stop(process: subprocess.Popen[str], before: Callable[[], None],
          send: Callable[[], None]) -> str:
    """Run ``before`` (waits on the journal), then ``send`` (a signal); return stderr once the
    process ended (bounded), killing it and closing its pipes whatever happened."""
    try:
        before()
        send()
        _, err = process.communicate(timeout=120)
        return err
    finally:
        if process.poll() is None:
            process.kill()
        process.communicate()


def _kill_and_resume(tmp_path: Path, servers: Any, command: str, spec: str,
                     sig: signal.Signals, strategy: str = "phase_lock") -> None:
    server = servers("--delay-s", "0.01", name=f"rig-{command}")
    store = tmp_path / "good.json"
    config = tiny_config(tmp_path / "c.toml", server.endpoint, store,
                         search={"strategy": strategy}, **NIGHT)
    if command in ("retune", "track"):
        done = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "first"))
        assert done.returncode == 0, done.stderr[-3000:]
        with _client(server.endpoint) as rig:
            rig.thermal_step(15e3)
    run = tmp_path / "run"
    args = [command, "--config", str(config), "--out", str(run)]
    process = start_autotune(*args)
    try:
        journal = run / JOURNAL_NAME
        if spec in ("night_retune", "decision:alarm"):
            # A thermal step once the night holds: its checks raise the alarm, a retune begins
            # (the night's start retune already took up the step made before it).
            wait_for_record(journal, _matcher("hold"), process=process)
            with _client(server.endpoint) as rig:
                rig.thermal_step(15e3)
        wait_for_record(journal, _matcher(spec), process=process)
        process.send_signal(sig)
        _, err = process.communicate(timeout=120)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    if sig == signal.SIGKILL:
        assert process.returncode == -signal.SIGKILL
        hint = f"autotune {command} --config {config} --resume {run}"
    else:
        last = read_journal(journal)[-1] if journal.exists() else {}
        if process.returncode == 0:
            # The signal landed after the stage's last operation (after the verification's
            # estimate only the verdict is left to write): the run ends as it would have, and
            # its journal must be whole and account for every shot, with nothing to resume.
            # Only a stage's verification can be that late: a night (hours of rig time) or an
            # earlier record that ends with 0 did not act on the signal.
            assert command != "track" and "verify" in spec, (command, spec, err[-3000:])
            assert last.get("type") == "end", last
            assert "Continue with: " not in err
            _check_shots(server.endpoint, _journals(tmp_path / "first") + _journals(run))
            return
        assert process.returncode == 130, err[-3000:]
        assert "stopped by signal" in err
        assert "the rig confirmed its safe set-points" in err
        hint = err.split("Continue with: ", 1)[1].strip().splitlines()[0]
        assert hint == f"autotune {command} --config {config} --resume {run}"
    resumed = subprocess.run([sys.executable, "-m", "autotune.cli", *shlex.split(hint)[1:]],
                             capture_output=True, text=True, timeout=600, cwd=REPO,
                             stdin=subprocess.DEVNULL)
    assert resumed.returncode == 0, resumed.stderr[-3000:]
    _check_shots(server.endpoint, _journals(tmp_path / "first") + _journals(run))


def _check_shots(endpoint: str, journals: list[Path]) -> None:
    """Every journal keeps its invariants, and every shot the rig took is in one of them,
    once: nothing lost, nothing measured twice."""
    total = 0
    for path in journals:
        records = read_journal(path)
        check_invariants(records)
        total += journal_shots(records)
    assert _rig_shots(endpoint) == total


# Every record kind of each command with every signal in the slow suite; in the default one,
# a fixed sample of five: each command, each signal, both strategies, on the kinds that
# matter most (a write-ahead request, an estimate, the other strategy's final scan, a
# retune's check, a retune begun inside the night). A track case costs a calibration and a
# night (about 15 s of CPU): the night's stop by signal is also in the default suite in
# tests/test_track_process.py (SIGTERM mid-night, resumed) and tests/test_track.py. The
# in-process matrices of tests/test_resume.py and tests/test_track.py resume from a record
# of every type of all three stages in the default suite; this one proves that the resume
# the stop message names works through real processes and signals.
CASES = {
    ("calibrate", "phase_lock"): [
        "start", "stage", "proposal", "measurement:lock", "request", "acquisition", "estimate",
        "move", "measurement:velocity", "decision:stop_search", "measurement:verify",
        "estimate:verify"],
    ("calibrate", "bayesian"): ["proposal", "estimate", "decision:refine_plan", "estimate:verify"],
    ("retune", "phase_lock"): ["measurement:check", "request", "estimate:check",
                               "decision:verdict", "proposal", "estimate:correct|verify"],
    ("retune", "bayesian"): ["estimate:check", "decision:search", "proposal"],
    ("track", "phase_lock"): ["hold", "decision:correct", "night_retune", "between_checks",
                              "request", "estimate:hold", "decision:plan", "decision:alarm",
                              "decision:stage_done", "estimate:check"],
}
DEFAULT = [("calibrate", "phase_lock", "request", signal.SIGKILL),
           ("calibrate", "phase_lock", "estimate", signal.SIGINT),
           ("calibrate", "bayesian", "decision:refine_plan", signal.SIGTERM),
           ("retune", "phase_lock", "estimate:check", signal.SIGKILL),
           ("track", "phase_lock", "night_retune", signal.SIGKILL)]
COMPLETE = [(command, strategy, spec, sig) for (command, strategy), specs in CASES.items()
            for spec in specs for sig in SIGNALS
            if (command, strategy, spec, sig) not in DEFAULT]


def _case_id(case: tuple[str, str, str, signal.Signals]) -> str:
    return f"{case[0]}-{case[1]}-{case[2]}-{case[3].name}"


@pytest.mark.parametrize("case", DEFAULT, ids=_case_id)
def test_killed_after_each_record_kind_the_run_resumes(tmp_path, servers, case):
    """Stopped after a record of this kind, the run resumes with the named command, finishes,
    keeps the journal's invariants and accounts for every shot the rig counted."""
    command, strategy, spec, sig = case
    _kill_and_resume(tmp_path, servers, command, spec, sig, strategy)


@pytest.mark.slow
@pytest.mark.parametrize("case", COMPLETE, ids=_case_id)
def test_the_rest_of_the_kill_matrix(tmp_path, servers, case):
    """The other signals for every record kind (the complete kill matrix)."""
    command, strategy, spec, sig = case
    _kill_and_resume(tmp_path, servers, command, spec, sig, strategy)


def test_a_rig_restarted_mid_run_is_noticed_and_never_filed(tmp_path, servers):
    """A rig stopped and started again on the same endpoint between acquisitions: the run says
    so, applies its set-points again, repeats the acquisition and files nothing measured at
    other set-points; it ends accepted."""
    first = servers("--delay-s", "0.05", name="before")
    store = tmp_path / "good.json"
    config = tiny_config(tmp_path / "c.toml", first.endpoint, store,
                         bus={"timeout_s": 1.0, "retries": 20, "backoff_s": 0.05})
    run = tmp_path / "run"
    process = start_autotune("calibrate", "--config", str(config), "--out", str(run))
    try:
        wait_for_record(run / JOURNAL_NAME,
                        lambda r: r["type"] == "acquisition" and r["point"] == 1,
                        process=process)
        first.kill()
        second = servers(name="after", bind=first.endpoint)
        out, err = process.communicate(timeout=300)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    assert process.returncode == 0, err[-3000:]
    records = read_journal(run / JOURNAL_NAME)
    check_invariants(records)
    restarts = [r for r in records if r["type"] == "decision" and r["what"] == "rig_restarted"]
    assert restarts and "instance changed" in restarts[0]["reason"]
    assert any(r["type"] == "rig" for r in records)
    # The successor took only the shots filed after the restart, or discarded on noticing it.
    noticed = next(i for i, r in enumerate(records) if r["type"] == "discarded" or (
        r["type"] == "decision" and r["what"] == "rig_restarted"))
    after = records[noticed:]
    assert _rig_shots(second.endpoint) == journal_shots(after)


def test_every_shot_is_accounted_for_under_heavy_faults(tmp_path, servers):
    """With 30 % of replies dropped, 20 % corrupted and each fresh reply 0.3 s late, and a bus
    that resends only once (so the loop's own retries happen too), the rig's shot total equals
    the journal's: every retry kept its msg_id and the rig answered it from its replay cache."""
    server = servers("--drop-probability", "0.3", "--delay-s", "0.3",
                     "--corrupt-probability", "0.2", name="faulty")
    store = tmp_path / "good.json"
    config = tiny_config(tmp_path / "c.toml", server.endpoint, store,
                         bus={"timeout_s": 0.8, "retries": 1, "backoff_s": 0.05},
                         recovery={"step_retries": 10, "retry_wait_s": 0.05},
                         search={"max_points": 2, "min_points": 2, "n_initial_points": 1,
                                 "refine_points": 0})
    run = tmp_path / "run"
    done = autotune("calibrate", "--config", str(config), "--out", str(run), timeout=900)
    assert done.returncode == 0, done.stderr[-3000:]
    records = read_journal(run / JOURNAL_NAME)
    check_invariants(records)
    assert any(r["type"] == "decision" and r["what"] == "retry" for r in records)
    assert _rig_shots(server.endpoint) == journal_shots(records)


#: The refusals below share one rig process (pytest-xdist's loadgroup runs them on one worker,
#: one after another): each reads its state before and after, so each still shows that its
#: refusal left the rig untouched.
_SHARES_RIG = pytest.mark.xdist_group("test_survival_untouched_rig")


@pytest.fixture(scope="module")
def untouched_rig(tmp_path_factory: pytest.TempPathFactory) -> Any:
    """One simulated rig process that no refusal may move."""
    server = spawn_server(tmp_path_factory.mktemp("untouched"), "untouched")
    yield server
    server.stop()


@_SHARES_RIG
def test_a_bad_run_is_refused_before_the_first_move(tmp_path, untouched_rig):
    """Shots above the rig's limit, a store under a regular file and a box outside the rig's
    limits are reported together, exit 2, no run folder, and the rig never moved."""
    server = untouched_rig
    blocker = tmp_path / "plain-file"
    blocker.write_text("not a folder")
    config = tiny_config(tmp_path / "c.toml", server.endpoint, blocker / "good.json",
                         measurement={"verification_shots_per_phase": 150_000},
                         setpoints={"velocity": {"limit_max": 800.0, "search_max": 750.0}})
    with _client(server.endpoint) as rig:
        before = rig.status()
    done = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"))
    assert done.returncode == 2, done.stderr[-3000:]
    for fragment in ("3 problems", "measurement.verification_shots_per_phase",
                     "max_shots_per_acquisition = 100000", "calibration.store",
                     "setpoints.velocity.search_min/search_max"):
        assert fragment in done.stderr
    assert not (tmp_path / "run").exists()
    with _client(server.endpoint) as rig:
        after = rig.status()
    assert (after.shots_total, dict(after.setpoints)) == (before.shots_total, dict(before.setpoints))


@_SHARES_RIG
def test_a_wrong_unit_and_limits_outside_the_rigs_name_the_file_and_keys(tmp_path, untouched_rig):
    """A detuning configured in kHz and velocity limits wholly outside the rig's are both named
    by the config file and key (README: a wrong key names the file, the key, what was expected
    and what was found), exit 2, no run folder, and the rig never moved."""
    server = untouched_rig
    config = tiny_config(tmp_path / "c.toml", server.endpoint, tmp_path / "good.json",
                         setpoints={"velocity": {"limit_min": 750.0, "limit_max": 900.0,
                                                 "search_min": 760.0, "search_max": 800.0},
                                    "detuning": {"unit": "kHz"}},
                         # a nominal 2π velocity inside that box (781.6 m/s), as the config
                         # requires before any connection
                         nominal={"waist_m": 9.0e-3})
    with _client(server.endpoint) as rig:
        before = rig.status()
    done = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"))
    assert done.returncode == 2, done.stderr[-3000:]
    assert "2 problems" in done.stderr
    assert f"{config}: setpoints.detuning.unit: expected the rig's unit 'Hz', got 'kHz'" \
        in done.stderr
    assert f"{config}: setpoints.velocity.limit_min/limit_max: expected limits that overlap " \
           "the rig's [300, 700] m/s" in done.stderr
    assert "<BusClient>" not in done.stderr and "Traceback" not in done.stderr
    assert not (tmp_path / "run").exists()
    with _client(server.endpoint) as rig:
        after = rig.status()
    assert (after.shots_total, dict(after.setpoints)) == (before.shots_total, dict(before.setpoints))


def test_a_finished_run_resumed_tells_its_outcome_again_and_moves_nothing(tmp_path, servers):
    """A resume of a run that already ended (a process killed after its end record, or the
    same resume run twice by a script): nothing is sent to the rig, the summary of its
    result.json is printed again and the exit status is the run's own (0 when accepted)."""
    server = servers(name="rig-ended")
    config = tiny_config(tmp_path / "c.toml", server.endpoint, tmp_path / "good.json")
    run = tmp_path / "run"
    done = autotune("calibrate", "--config", str(config), "--out", str(run))
    assert done.returncode == 0, done.stderr[-3000:]
    with _client(server.endpoint) as rig:
        before = rig.status()
    lines = len(read_journal(run / JOURNAL_NAME))
    for _ in range(2):
        again = autotune("calibrate", "--config", str(config), "--resume", str(run))
        assert again.returncode == 0, again.stderr[-3000:]
        assert "the run already ended (accepted); nothing to resume; nothing was sent to the " \
               "rig" in again.stderr
        assert again.stdout == done.stdout
    assert len(read_journal(run / JOURNAL_NAME)) == lines
    with _client(server.endpoint) as rig:
        after = rig.status()
    assert (after.shots_total, dict(after.setpoints)) == (before.shots_total, dict(before.setpoints))
    wrong = autotune("retune", "--config", str(config), "--resume", str(run))
    assert wrong.returncode == 2
    assert f"resume it with 'autotune calibrate --config CONFIG --resume {run}'" in wrong.stderr
    # Read from the folder alone: told again with the rig down too.
    server.stop()
    down = autotune("calibrate", "--config", str(config), "--resume", str(run), timeout=120)
    assert down.returncode == 0, down.stderr[-3000:]
    assert down.stdout == done.stdout


@_SHARES_RIG
def test_a_box_in_khz_and_limits_without_the_safe_point_are_refused(tmp_path, untouched_rig):
    """Two slips a new user makes, caught before anything moves (exit 2, no run folder, rig
    untouched): kHz numbers typed in the detuning box in Hz (narrower than the lock's first
    step: the run would search a 120 Hz box and be accepted at its edge), and velocity limits
    that exclude the rig's safe set-point (every stop would take the rig outside them)."""
    server = untouched_rig
    config = tiny_config(tmp_path / "c.toml", server.endpoint, tmp_path / "good.json",
                         setpoints={"detuning": {"search_min": -60.0, "search_max": 60.0,
                                                 "limit_min": -150.0, "limit_max": 150.0,
                                                 "max_step": 20.0},
                                    "velocity": {"limit_min": 505.0, "search_min": 505.0}},
                         nominal={"waist_m": 5.9e-3})  # 2π velocity 512.4 m/s, in the box
    with _client(server.endpoint) as rig:
        before = rig.status()
        safe = rig.describe().safe_setpoints
    assert safe["velocity"] < 505.0  # the simulated rig's safe velocity (configs/sim-rig.toml)
    done = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"))
    assert done.returncode == 2, done.stderr[-3000:]
    assert f"{config}: setpoints.detuning.search_min/search_max: expected a box at least a " \
           "tenth of the lock's first step wide" in done.stderr
    assert f"{config}: setpoints.velocity.limit_min/limit_max: expected limits that hold the " \
           f"rig's safe set-point {safe['velocity']:g} m/s" in done.stderr
    assert not (tmp_path / "run").exists()
    with _client(server.endpoint) as rig:
        after = rig.status()
    assert (after.shots_total, dict(after.setpoints)) == (before.shots_total, dict(before.setpoints))


def test_a_config_with_several_wrong_keys_names_them_all(tmp_path):
    """min_points above max_points, n_initial_points above it too and a negative timeout:
    one message with every problem, exit 2, before any connection (README: configuration)."""
    config = tiny_config(tmp_path / "c.toml", "tcp://127.0.0.1:9", tmp_path / "good.json",
                         search={"max_points": 3, "min_points": 5, "n_initial_points": 4},
                         bus={"timeout_s": -1.0})
    done = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"),
                    timeout=60)
    assert done.returncode == 2
    for key in ("search.min_points", "search.n_initial_points", "bus.timeout_s"):
        assert key in done.stderr
    assert not (tmp_path / "run").exists()


def test_a_missing_store_folder_is_created_and_the_calibration_kept(tmp_path, servers):
    """The shipped configs keep the store in a folder that may not exist yet: it is created,
    and the accepted calibration is written there."""
    server = servers(name="store")
    store = tmp_path / "not" / "yet" / "there" / "good.json"
    config = tiny_config(tmp_path / "c.toml", server.endpoint, store)
    done = autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"))
    assert done.returncode == 0, done.stderr[-3000:]
    assert read_json(store)["setpoints"] == read_json(tmp_path / "run" / RESULT_NAME)["setpoints"]


def test_a_dry_run_below_acceptance_reports_and_skips_the_retune(tmp_path):
    """A calibration below min_inversion: exit 4, its result reported, the retune skipped with
    its reason (no crash on a missing last good file)."""
    config = tiny_config(tmp_path / "c.toml", "tcp://127.0.0.1:9", tmp_path / "unused.json",
                         acceptance={"min_inversion": 0.99})
    out = tmp_path / "dry"
    done = autotune("dry-run", "--config", str(config), "--out", str(out))
    assert done.returncode == 4, done.stderr[-3000:]
    assert "calibrate: below_acceptance" in done.stdout
    assert "retune skipped: the calibration was not accepted" in done.stdout
    assert not (out / "retune").exists()


def test_a_dry_run_stopped_at_the_terminal_leaves_its_rig_safe(tmp_path):
    """Ctrl-C at a terminal signals the whole foreground group; the simulated rig runs in its
    own session, so it is still there to confirm its safe set-points, and the message says so."""
    out = tmp_path / "dry"
    process = start_autotune("dry-run", "--out", str(out), start_new_session=True)
    err = _stop(process, lambda: wait_for_record(out / "calibrate" / JOURNAL_NAME,
                                                 _matcher("estimate"), process=process),
                lambda: os.killpg(process.pid, signal.SIGINT))
    assert process.returncode == 130, err[-3000:]
    assert "the rig confirmed its safe set-points" in err
    records = read_journal(out / "calibrate" / JOURNAL_NAME)
    assert records[-1]["status"] == "interrupted" and any(r["type"] == "safe" for r in records)


def _calibration_on_a_slow_rig(tmp_path: Path, servers: Any, name: str,
                               recovery: dict[str, Any]
                               ) -> tuple[ServerProcess, Path, subprocess.Popen[str]]:
    """A rig answering after 50 ms, a calibration started on it with short bus waits and the
    given [recovery]: the rig, the run folder and the process."""
    server = servers("--delay-s", "0.05", name=name)
    config = tiny_config(tmp_path / "c.toml", server.endpoint, tmp_path / "good.json",
                         bus={"timeout_s": 0.3, "retries": 1, "backoff_s": 0.05},
                         recovery=recovery)
    run = tmp_path / "run"
    return server, run, start_autotune("calibrate", "--config", str(config), "--out", str(run))


def test_a_stop_with_the_rig_gone_says_safe_was_not_confirmed(tmp_path, servers):
    """SIGTERM after the rig died: exit 130 and a message that the safe set-points were NOT
    confirmed (never the comforting default)."""
    server, run, process = _calibration_on_a_slow_rig(
        tmp_path, servers, "doomed", {"step_retries": 30, "retry_wait_s": 0.2})

    def rig_dies() -> None:
        wait_for_record(run / JOURNAL_NAME, _matcher("acquisition"), process=process)
        server.kill()
        wait_for_record(run / JOURNAL_NAME, _matcher("decision:retry"), process=process)

    err = _stop(process, rig_dies, lambda: process.send_signal(signal.SIGTERM))
    assert process.returncode == 130, err[-3000:]
    assert "did NOT confirm its safe set-points" in err
    assert any(r["type"] == "safe_failed" for r in read_journal(run / JOURNAL_NAME))


def test_a_rig_lost_mid_run_says_safe_was_not_confirmed(tmp_path, servers):
    """The rig dies mid-run and stays away: exit 3 (README: rig unreachable or failing), and
    the last message says the safe set-points were NOT confirmed, as a stop by signal does, not
    only a log line further up; the journal records the failed safe op."""
    server, run, process = _calibration_on_a_slow_rig(
        tmp_path, servers, "lost", {"step_retries": 1, "retry_wait_s": 0.1})
    err = _stop(process, lambda: wait_for_record(run / JOURNAL_NAME, _matcher("acquisition"),
                                                 process=process),
                server.kill)
    assert process.returncode == 3, err[-3000:]
    assert "autotune: the rig did NOT confirm its safe set-points" in err
    assert "continue with: autotune calibrate" in err
    assert any(r["type"] == "safe_failed" for r in read_journal(run / JOURNAL_NAME))
