"""Fixtures of every test folder: simulated rigs in real subprocesses, throwaway CURVE keys, the
README's dry run (run once per test session and read by every test that checks its output)."""

from __future__ import annotations

import os

# One BLAS thread per process, set before numpy is first imported here and inherited by every
# worker and subprocess of the suite: four workers on two cores, each with OpenBLAS's own
# threads spinning for the small matrices of the Gaussian-process fits, spent twice the CPU
# (tests/test_search.py's determinism and resume tests side by side: 31.2 s of CPU with the
# default threads, 14.8 s with one, same results). A value set by the caller is kept.
for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")

import fcntl
import json
import shlex
import shutil
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
import zmq.auth
from cli_helpers import README_DRY_RUN, DryRun, autotune
from rig_process import CurveFiles, ServerProcess, spawn_server


@pytest.fixture(scope="session")
def readme_dry_run(tmp_path_factory: pytest.TempPathFactory, worker_id: str) -> DryRun:
    """The README's ``autotune dry-run`` run once per test session, from an empty folder.

    One dry run takes a core for tens of seconds; five test files read one. pytest-xdist's
    workers share it through a lock in their common temporary folder (the first runs it, the
    others wait for it and read what it left).
    """
    root = tmp_path_factory.getbasetemp()
    if worker_id != "master":
        root = root.parent  # the folder every worker of this session shares
    here = root / "readme-dry-run"
    done = here / "done.json"
    with open(root / "readme-dry-run.lock", "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        if not done.exists():
            here.mkdir(exist_ok=True)
            ran = autotune(*shlex.split(README_DRY_RUN)[1:], cwd=here)
            done.write_text(json.dumps({"returncode": ran.returncode, "stdout": ran.stdout,
                                        "stderr": ran.stderr}), encoding="utf-8")
    outcome = json.loads(done.read_text(encoding="utf-8"))
    folders = sorted((here / "runs").glob("dry-run-*")) if (here / "runs").is_dir() else []
    return DryRun(outcome["returncode"], outcome["stdout"], outcome["stderr"],
                  folders[0] if len(folders) == 1 else None)


@pytest.fixture
def servers(tmp_path: Path) -> Iterator[Callable[..., ServerProcess]]:
    """Factory of server subprocesses (:func:`rig_process.spawn_server`: ``autotune rig`` by
    default, on a loopback port), all stopped at teardown.

    ``servers(*flags, name=None, **options)``: ``flags`` go to the command line (fault
    injection such as ``--drop-probability 0.33``), ``options`` to ``spawn_server`` (``seed``,
    ``config``, ``command``, ...); ``name`` (default ``rig0``, ``rig1``, ...) names its ready
    and log files in the test's folder.
    """
    started: list[ServerProcess] = []

    def start(*flags: str, name: str | None = None, **options: Any) -> ServerProcess:
        server = spawn_server(tmp_path, name or f"rig{len(started)}", *flags, **options)
        started.append(server)
        return server

    yield start
    for server in started:
        server.stop()


@pytest.fixture
def curve_files(tmp_path: Path) -> CurveFiles:
    """A server key pair, one allowed client and one stranger, made fresh for the test
    (pyzmq's ``zmq.auth.create_certificates``)."""
    keys = tmp_path / "keys"
    for folder in ("server", "client", "stranger"):
        (keys / folder).mkdir(parents=True)
    server_public, server_secret = zmq.auth.create_certificates(keys / "server", "server")
    client_public, client_secret = zmq.auth.create_certificates(keys / "client", "client")
    _, stranger_secret = zmq.auth.create_certificates(keys / "stranger", "stranger")
    allowed = keys / "allowed"
    allowed.mkdir()
    shutil.copy(client_public, allowed / Path(client_public).name)
    return CurveFiles(Path(server_public), Path(server_secret), allowed, Path(client_secret),
                      Path(stranger_secret))
