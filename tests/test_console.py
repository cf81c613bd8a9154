"""What a person reads on the terminal: short lines, repeated warnings merged, help texts that
say what each command does and how it exits, the nearest name for a mistyped one.

Real processes (``python -m autotune.cli``) for everything a user runs; the line formatter
directly for its cut. Outside reference: the run folder's own log.jsonl (the full text).
"""

from __future__ import annotations

import functools
import subprocess
import sys

import pytest

from autotune.cli import console
from cli_helpers import DryRun
from rig_process import REPO

MOVING = ("calibrate", "retune", "track", "serve", "probe")
NOT_MOVING = ("rig", "dry-run", "report")
PROGRESS = ("calibrate", "retune", "track", "dry-run")


def _autotune(*args: str, timeout: float = 120.0) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "autotune.cli", *args], capture_output=True,
                          text=True, timeout=timeout, cwd=REPO, stdin=subprocess.DEVNULL)


@functools.cache
def _help(command: str) -> subprocess.CompletedProcess[str]:
    """``autotune COMMAND --help`` run once per command in this process: the two help tests
    below read the same text (their xdist group keeps them on one worker)."""
    return _autotune(command, "--help", timeout=60)


_READS_HELP = pytest.mark.xdist_group("test_console_help")


LONG_VERDICT = ("check's phase error +0.462 +- 0.025 pi: set-point +18.42 kHz from the peak "
                "[-3.47, +40.31] (95%); velocity not judged (phase error beyond the absorption "
                "window); predicted shortfall 25.15%, bound 29.66% above 2.0%: correct the "
                "detuning to -18.85 kHz")


def test_a_long_decision_fits_a_line_and_keeps_its_action() -> None:
    """A 240-character reason becomes one line of at most 150 characters, cut at a clause and
    never inside parentheses, ending with the decision itself."""
    line = console._console_line(None, "info", {"timestamp": "2026-12-04T13:50:18.193Z",
                                            "event": "decision", "what": "verdict",
                                            "reason": LONG_VERDICT, "stage": "retune"})
    assert len(line) <= console.CONSOLE_WIDTH
    assert line.startswith("13:50:18 retune: verdict: check's phase error +0.462")
    assert line.endswith(": correct the detuning to -18.85 kHz") and "[...]" in line
    kept = line.split(" [...]")[0]
    assert kept.count("(") == kept.count(")")


def test_a_short_line_is_left_whole() -> None:
    """A line within the width keeps its details."""
    line = console._console_line(None, "info", {"timestamp": "2026-12-04T13:50:18.193Z",
                                            "event": "decision", "what": "store",
                                            "reason": "written", "stage": "calibrate",
                                            "attempt": 2})
    assert line == "13:50:18 calibrate: store: written (attempt 2)"


def test_repeated_warnings_are_merged_with_a_count() -> None:
    """Four warnings that differ only in their numbers: one line and 'repeated 3 more times';
    a different warning after them starts again; the count of the last run is said at exit."""
    code = ("import structlog\n"
            "from autotune.cli import console\n"
            "console.configure_logging('info')\n"
            "log = structlog.get_logger('autotune.test')\n"
            "for k in range(4):\n"
            "    log.warning('readback_differs', setpoint='detuning', got=1234.5 + k)\n"
            "log.info('decision', what='move', reason='next point')\n"
            "for k in range(3):\n"
            "    log.warning('slow_reply', waited_s=1.0 + k)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60, cwd=REPO)
    assert done.returncode == 0, done.stderr
    lines = [line.split(" ", 1)[1] for line in done.stderr.splitlines()]
    assert lines == [
        "WARNING readback_differs (setpoint detuning; got 1234)",
        "WARNING the warning above repeated 3 more times (each in the run folder's log.jsonl)",
        "move: next point",
        "WARNING slow_reply (waited 1.0 s)",
        "WARNING the warning above repeated 2 more times (each in the run folder's log.jsonl)"]


@_READS_HELP
@pytest.mark.parametrize("command", MOVING + NOT_MOVING)
def test_each_command_has_a_description_and_the_caution_only_where_it_moves_a_rig(command):
    """Every command's --help describes it; the caution is in the help of the commands that
    move a rig, once, and in no other; acting commands give their exit codes."""
    done = _help(command)
    assert done.returncode == 0, done.stderr
    text = " ".join(done.stdout.split())
    description = done.stdout.split("\n\n")[1]
    assert not description.lstrip().startswith(("positional arguments", "options")), command
    assert text.count("CAUTION") == (1 if command in MOVING else 0)
    if command in MOVING or command in ("dry-run", "report"):
        assert "Exit 0" in text, command
    if command in ("calibrate", "retune"):
        assert "4 when its inversion is below min_inversion" in text
    if command in ("probe", "report"):
        assert "run folder's log.jsonl" not in text  # they have no run folder


def test_the_top_level_help_points_at_the_caution_without_repeating_it() -> None:
    """autotune --help names the commands that act on a rig; the caution itself is theirs."""
    done = _autotune("--help", timeout=60)
    assert done.returncode == 0
    assert "CAUTION" not in done.stdout and "interlocks" in done.stdout


@pytest.mark.parametrize(("typed", "meant"), [("calibrat", "calibrate"), ("reprot", "report"),
                                              ("dryrun", "dry-run")])
def test_a_mistyped_command_names_the_nearest(typed, meant):
    """An unknown command exits 2 and suggests the nearest command's name."""
    done = _autotune(typed, timeout=60)
    assert done.returncode == 2
    assert f"did you mean '{meant}'?" in done.stderr


def test_a_server_that_does_not_start_says_why_in_a_sentence(tmp_path) -> None:
    """autotune rig with a missing config: exit 2, its JSON log line, and a sentence naming the
    file (not only JSON)."""
    missing = tmp_path / "nope.toml"
    done = _autotune("rig", "--config", str(missing), "--bind", "tcp://127.0.0.1:0", timeout=60)
    assert done.returncode == 2
    sentences = [line for line in done.stderr.splitlines() if not line.startswith("{")]
    assert any(line.startswith("autotune: the server did not start:") and str(missing) in line
               for line in sentences), done.stderr


def test_every_line_of_a_dry_run_is_short(readme_dry_run: DryRun) -> None:
    """stdout and stderr of a dry run: every line at most 150 characters."""
    done = readme_dry_run  # the session's one README dry run (conftest.py)
    assert done.returncode == 0, done.stderr[-2000:]
    long = [line for line in (done.stdout + done.stderr).splitlines()
            if len(line) > console.CONSOLE_WIDTH]
    assert not long, long


def test_a_rig_that_does_not_answer_is_named_at_once(tmp_path) -> None:
    """calibrate against a closed port: the first line names the endpoint and the waits before
    any timeout has run out; then one warning per retry; exit 3."""
    import tomllib

    from cli_helpers import to_toml

    data = tomllib.loads((REPO / "configs" / "dry-run.toml").read_text())
    data["bus"].update(endpoint="tcp://127.0.0.1:9", timeout_s=1.0, retries=2, backoff_s=0.1)
    # The opening describe goes through the run's recovery too: (1 + step_retries) rounds of
    # the bus's retries, each retry one line.
    data.setdefault("recovery", {}).update(step_retries=1, retry_wait_s=0.1)
    config = tmp_path / "down.toml"
    config.write_text(to_toml(data))
    done = _autotune("calibrate", "--config", str(config), "--out", str(tmp_path / "run"))
    assert done.returncode == 3, done.stderr[-2000:]
    lines = done.stderr.splitlines()
    assert lines[0].endswith("connect (endpoint tcp://127.0.0.1:9; timeout 1.0 s; retries 2)")
    assert sum("bus_retry" in line for line in lines) == 2 * 2


@_READS_HELP
@pytest.mark.parametrize("command", MOVING + NOT_MOVING)
def test_quiet_speaks_of_a_progress_line_only_where_there_is_one(command) -> None:
    """--quiet's help names the progress line only for the commands that draw one (a stage or
    a night: calibrate, retune, track, dry-run); options are described as they are (common
    practice of command-line help)."""
    done = _help(command)
    assert done.returncode == 0
    quiet = " ".join(done.stdout.split("--quiet ", 2)[-1].split("\n\n")[0].split())
    assert quiet.startswith("no progress line" if command in PROGRESS else "only warnings"), quiet


def test_a_server_that_cannot_listen_says_so_in_a_sentence(tmp_path) -> None:
    """autotune rig on a port a listening socket already holds (the kernel refuses a second
    bind: EADDRINUSE, POSIX bind(2)): exit 1, its JSON log line for a collector, and a sentence
    naming the endpoint and what to do."""
    import socket

    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        endpoint = f"tcp://127.0.0.1:{taken.getsockname()[1]}"
        done = _autotune("rig", "--bind", endpoint, timeout=60)
    assert done.returncode == 1, done.stderr
    assert '"event": "server_bind_failed"' in done.stderr
    sentence = [line for line in done.stderr.splitlines()
                if line.startswith("autotune: the server did not start:")]
    assert len(sentence) == 1 and f"cannot listen on {endpoint}" in sentence[0], done.stderr
    assert "Address already in use" in sentence[0] and "--bind another" in sentence[0]
    assert len(sentence[0]) <= console.CONSOLE_WIDTH, sentence


def test_a_server_that_does_not_start_on_a_terminal_says_only_the_sentence(tmp_path) -> None:
    """autotune rig with a missing config, its output on a real terminal (a pseudo-terminal,
    POSIX openpty): exit 2 and the sentence naming the file, no JSON line (that goes to a log
    collector, a file or a pipe, as the test above checks)."""
    import os
    import pty

    missing = tmp_path / "nope.toml"
    master, slave = pty.openpty()
    try:
        process = subprocess.Popen([sys.executable, "-m", "autotune.cli", "rig", "--config",
                                    str(missing), "--bind", "tcp://127.0.0.1:0"], cwd=REPO,
                                   stdin=subprocess.DEVNULL, stdout=slave, stderr=slave)
        os.close(slave)
        chunks = []
        while True:
            try:
                chunk = os.read(master, 4096)
            except OSError:  # EIO: the terminal's other end closed (Linux)
                break
            if not chunk:
                break
            chunks.append(chunk)
        assert process.wait(timeout=60) == 2
    finally:
        os.close(master)
    lines = b"".join(chunks).decode("utf-8", "replace").splitlines()
    assert not [line for line in lines if line.lstrip().startswith("{")], lines
    assert any(line.startswith("autotune: the server did not start:") and str(missing) in line
               for line in lines), lines


#: Run the CLI in a process that writes a line to stderr when a heavy library is first imported
#: (a finder on sys.meta_path, Python language reference section 5.5, "The meta path").
_WATCH_IMPORTS = """
import sys

class Watch:
    heavy = {"scipy", "skopt", "matplotlib", "sklearn"}

    def find_spec(self, name, path=None, target=None):
        if name in self.heavy:
            self.heavy.discard(name)
            print(f"IMPORTED {name}", file=sys.stderr, flush=True)
        return None

sys.meta_path.insert(0, Watch())
from autotune.cli import main
sys.exit(main(sys.argv[1:]))
"""


@pytest.mark.parametrize("command", ["calibrate", "track"])
def test_the_first_line_comes_before_the_heavy_imports(tmp_path, command) -> None:
    """A rig that does not answer: the command's first line (connect, naming the endpoint) is
    on the terminal before scipy, scikit-optimize or matplotlib is imported (they take seconds
    on a loaded machine; benchmarks/first_line.py measures it), and the run still imports them
    afterwards, so the watch is not idle."""
    import tomllib

    from cli_helpers import to_toml

    data = tomllib.loads((REPO / "configs" / "dry-run.toml").read_text())
    data["bus"].update(endpoint="tcp://127.0.0.1:9", timeout_s=0.5, retries=1, backoff_s=0.1)
    data.setdefault("recovery", {}).update(step_retries=0, retry_wait_s=0.1)
    config = tmp_path / "down.toml"
    config.write_text(to_toml(data))
    done = subprocess.run([sys.executable, "-c", _WATCH_IMPORTS, command, "--config",
                           str(config), "--out", str(tmp_path / "run")], capture_output=True,
                          text=True, timeout=300, cwd=REPO, stdin=subprocess.DEVNULL)
    assert done.returncode == 3, done.stderr[-2000:]
    lines = done.stderr.splitlines()
    assert lines[0].endswith("connect (endpoint tcp://127.0.0.1:9; timeout 0.5 s; retries 1)"), \
        lines[:3]
    assert any(line.startswith("IMPORTED ") for line in lines[1:]), lines
