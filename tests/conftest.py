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

import sys
from pathlib import Path

# Compiled modules cached outside the tree, for this process, its xdist workers and every
# process the tests start (they inherit the environment). Where PYTHONDONTWRITEBYTECODE is set
# nothing was cached: each of the four workers rewrote and compiled every test module again
# (collection 8.2-8.6 s of CPU; 4.6-4.9 s from the cache) and each `autotune` process compiled
# the modules it imports (a stage's imports 0.78-0.89 s of CPU, 0.69-0.79 s from the cache).
# A prefix set by the caller is kept; nothing is written beside the sources. Only where
# PYTHONDONTWRITEBYTECODE is set: elsewhere (a fresh CI machine and venv) Python caches in
# __pycache__ already, and a prefix would only make every process ignore the installed
# libraries' compiled files and compile them again (a collection of test_next_point and
# test_config, cold: 4.4-5.1 s of CPU with a prefix, 2.5 s without; warm, 1.6 s either way).
# Where no absolute cache folder is known (no home, a relative XDG_CACHE_HOME:
# bytecode_cache.cache_prefix) the suite runs without one, as it did before.
from bytecode_cache import suite_prefix

_prefix = suite_prefix(os.environ)
if _prefix is not None:
    os.environ["PYTHONPYCACHEPREFIX"] = _prefix
    os.environ.pop("PYTHONDONTWRITEBYTECODE", None)
    sys.pycache_prefix = os.environ["PYTHONPYCACHEPREFIX"]
    sys.dont_write_bytecode = False

import fcntl
import json
import shlex
import shutil
from collections.abc import Callable, Iterator
from typing import Any

import pytest
import zmq.auth
from cli_helpers import README_DRY_RUN, DryRun, autotune
from rig_process import CurveFiles, ServerProcess, spawn_server


#: The longest tests outside an xdist group (their wall time in the whole default suite on the
#: loaded 2-core machine, longest first), started first so that the workers end together
#: instead of one of them running a long test alone at the end. pytest-xdist's loadgroup hands
#: out the groups with the most tests first (their module fixtures are the other long chains),
#: then single tests in collection order; a prefix that matches nothing is ignored.
LONG_FIRST = (
    "tests/test_survival.py::test_every_shot_is_accounted_for_under_heavy_faults",
    "tests/test_track_process.py::test_a_night_with_a_thermal_step",
    "tests/test_survival.py::test_killed_after_each_record_kind_the_run_resumes[track",
    "tests/test_faults.py::test_a_kill_between_a_moves_intent_and_its_outcome",
    "tests/test_faults.py::test_a_kill_while_the_rig_goes_safe",
    "tests/test_runlock.py::test_a_second_command_on_a_running_folder_is_refused",
    "tests/test_readme.py::test_readme_quick_start_runs_as_written",
    "tests/test_stored_results.py::test_the_stored_quick_check_reproduces",
    "tests/test_cli.py::test_report_summarises_a_run_folder_and_track_holds_from_it",
    "tests/test_report.py::test_report_of_a_killed_run",
    "tests/test_cli.py::test_calibrate_killed_and_resumed_loses_and_repeats_nothing",
    "tests/test_survival.py::test_killed_after_each_record_kind_the_run_resumes",
    "tests/test_report.py::test_a_run_still_going_is_told_at_the_top_of_the_page",
    "tests/test_loop.py::test_out_of_range_proposals_never_reach_the_rig",
    "tests/test_survival.py::test_a_finished_run_resumed_tells_its_outcome_again",
    "tests/test_runlock.py::test_a_rig_leased_to_another_client_is_refused_or_waited_for",
    "tests/test_track_process.py",
    "tests/test_search.py::test_bayesian_recommends_global_peak_not_ridge",
    "tests/test_progress.py::test_one_line_updated_in_place_on_a_terminal",
    "tests/test_survival.py::test_a_rig_restarted_mid_run_is_noticed_and_never_filed",
    "tests/test_faults.py::test_a_stop_with_the_rig_gone_takes_seconds",
    "tests/test_loop.py::test_interval_covers_the_truth_at_its_stated_rate",
    "tests/test_report.py::test_report_of_a_night_draws_its_timeline",
    "tests/test_guided.py::test_stopping_rule_rarely_stops_falsely_in_forty_calibrations",
    "tests/test_track.py::test_a_retune_not_accepted_but_as_good_as_the_last_calibration_is_held",
)


def pytest_collection_modifyitems(items: list[pytest.Item]) -> None:
    """Put the tests of :data:`LONG_FIRST` first, in its order (the others keep theirs)."""
    def rank(item: pytest.Item) -> int:
        return next((number for number, prefix in enumerate(LONG_FIRST)
                     if item.nodeid.startswith(prefix)), len(LONG_FIRST))

    items.sort(key=rank)


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
