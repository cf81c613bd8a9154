"""Running the ``autotune`` command in real processes, with configs written for a test."""

from __future__ import annotations

import fcntl
import json
import os
import pty
import select
import struct
import subprocess
import sys
import termios
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest

from rig_process import REPO

DRY_RUN = REPO / "configs" / "dry-run.toml"
RUN_TIMEOUT_S = 600.0

#: The README's dry run, exactly as written (tests/test_readme.py classifies it "run").
README_DRY_RUN = "autotune dry-run"


@dataclass(frozen=True)
class DryRun:
    """What the README's ``autotune dry-run`` did from an empty folder: its exit code, what it
    printed, and its run folder (``runs/dry-run-<UTC time>``: calibrate, retune, last-good.json).
    Shared by the tests of a session: read it, never write into it."""

    returncode: int
    stdout: str
    stderr: str
    folder: Path | None


def autotune(*args: str, timeout: float = RUN_TIMEOUT_S, cwd: Path | None = None
             ) -> subprocess.CompletedProcess[str]:
    """Run ``python -m autotune.cli ARGS`` to completion and return what it printed."""
    return subprocess.run([sys.executable, "-m", "autotune.cli", *args], capture_output=True,
                          text=True, timeout=timeout, cwd=cwd or REPO, stdin=subprocess.DEVNULL)


def start_autotune(*args: str, output: Any = subprocess.PIPE, **options: Any
                   ) -> subprocess.Popen[str]:
    """Start ``python -m autotune.cli ARGS`` in the background."""
    return subprocess.Popen([sys.executable, "-m", "autotune.cli", *args], cwd=REPO,
                            stdin=subprocess.DEVNULL, stdout=output, stderr=output, text=True,
                            **options)


def to_toml(data: dict[str, Any], prefix: str = "") -> str:
    """A small TOML writer for the config tables of the tests (scalars and nested tables)."""
    scalars = []
    tables = []
    for key, value in data.items():
        if isinstance(value, dict):
            tables.append(to_toml(value, f"{prefix}{key}."))
        else:
            scalars.append(f"{key} = {json.dumps(value)}")
    head = f"[{prefix[:-1]}]\n" if prefix and scalars else ""
    return head + "\n".join(scalars) + ("\n\n" if scalars else "") + "".join(tables)


def write_config(path: Path, endpoint: str, **sections: dict[str, Any]) -> Path:
    """The dry-run settings pointed at ``endpoint``, with some values changed, as a TOML file."""
    data = tomllib.loads(DRY_RUN.read_text())
    data["bus"]["endpoint"] = endpoint
    for section, values in sections.items():
        for key, value in values.items():
            data.setdefault(section, {})
            if isinstance(value, dict) and isinstance(data[section].get(key), dict):
                data[section][key].update(value)
            else:
                data[section][key] = value
    path.write_text(to_toml(data))
    return path


#: A calibration of a few seconds: at most 8 steps of 3 phases, small shots (the phase lock's
#: default); other strategies get 3 points and a 3-point final scan through :func:`tiny_config`.
TINY = {
    "measurement": {"shots_per_phase": 200, "ramsey_phases": 3, "resamples": 200,
                    "verification_shots_per_phase": 400},
    "search": {"max_points": 8, "min_points": 3, "n_initial_points": 2, "refine_points": 3},
    "retune": {"max_points": 2, "n_initial_points": 1, "check_shots_per_phase": 400,
               "max_shots": 100_000},
    "lock": {"lock_shots_per_phase": 200, "velocity_shots_per_phase": 200},
    # Eight steps of 200 shots cannot bound the shortfall within 1 %: these runs test the
    # mechanics (resume, store, faults), so they are accepted on the verified inversion alone.
    "acceptance": {"max_shortfall": 1.0},
}


def tiny_config(path: Path, endpoint: str, store: Path, **sections: dict[str, Any]) -> Path:
    """:data:`TINY` settings (plus ``sections``) against ``endpoint`` with the store at ``store``."""
    merged = {name: dict(values) for name, values in TINY.items()}
    for name, values in sections.items():
        merged.setdefault(name, {}).update(values)
    if merged["search"].get("strategy", "phase_lock") != "phase_lock" and \
            "max_points" not in sections.get("search", {}):
        merged["search"]["max_points"] = 3
    merged.setdefault("calibration", {})["store"] = str(store)
    return write_config(path, endpoint, **merged)


def run_in_a_terminal(argv: list[str], columns: int, timeout_s: float = 300.0
                       ) -> tuple[int, bytes]:
    """Run argv with stdin, stdout and stderr on a pseudo-terminal of ``columns`` columns."""
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 40, columns, 0, 0))
    process = subprocess.Popen(argv, stdin=slave, stdout=slave, stderr=slave, cwd=REPO)
    os.close(slave)
    output = b""
    deadline = time.monotonic() + timeout_s
    try:
        while time.monotonic() < deadline:
            ready, _, _ = select.select([master], [], [], 0.5)
            if ready:
                try:
                    chunk = os.read(master, 65536)
                except OSError:  # the child closed the terminal (Linux reports EIO)
                    break
                if not chunk:
                    break
                output += chunk
            elif process.poll() is not None:
                break
        return process.wait(timeout=60), output
    finally:
        if process.poll() is None:
            process.kill()
        os.close(master)


def wait_for_record(journal: Path, match: Any, timeout_s: float = 300.0,
                    process: subprocess.Popen[str] | None = None) -> dict[str, Any]:
    """Poll a journal until a record satisfies ``match(record)``; return it (bounded wait).

    Each record is read once, in order, as its line completes: every 10 ms the poll parses
    only what was appended since the last one (a line still being written waits for its
    newline). Parsing the whole journal at each poll cost 36 ms of CPU for a night's 1,000
    records, most of a core while a test waited on a long run. ``match`` may keep state (it
    sees each record once, in journal order; see :func:`wait_for_records`).
    """
    deadline = time.monotonic() + timeout_s
    offset = 0
    while time.monotonic() < deadline:
        try:
            with open(journal, "rb") as handle:
                handle.seek(offset)
                appended = handle.read()
        except FileNotFoundError:
            appended = b""
        complete = appended.rfind(b"\n") + 1
        offset += complete
        for line in appended[:complete].splitlines():
            record = json.loads(line)
            if match(record):
                return record
        if process is not None and process.poll() is not None:
            pytest.fail(f"the process ended ({process.returncode}) before the record appeared")
        time.sleep(0.01)
    pytest.fail(f"{journal} had no matching record within {timeout_s} s")


def wait_for_records(journal: Path, kind: str, count: int, timeout_s: float = 300.0,
                     process: subprocess.Popen[str] | None = None) -> dict[str, Any]:
    """Poll a journal until it holds ``count`` records of type ``kind``; return the last."""
    seen = 0

    def counted(record: dict[str, Any]) -> bool:
        nonlocal seen
        seen += record["type"] == kind
        return seen >= count

    return wait_for_record(journal, counted, timeout_s, process)
