"""A full disk (the journal's write or fsync fails) stops a run safely, and it resumes.

The failure is injected at the operating-system call the journal makes (``os.write`` /
``os.fsync`` raising ``ENOSPC``, what a full file system answers; common practice), in the
middle of a calibration on the simulated rig in process.
"""

from __future__ import annotations

import errno
import os
from pathlib import Path

import pytest

from autotune.run import journal as journal_module
from autotune.run import runner
from autotune.errors import JournalError
from autotune.run.journal import JOURNAL_NAME, read_journal, read_journal_prefix
from autotune.kit.server import LocalRig
from drivers_sim.config import load_sim_config
from drivers_sim.driver import SimulatedDriver
from drivers_sim.rig import SimulatedRig
from journal_checks import check_invariants
from rig_process import SIM_CONFIG
from test_resume import small_config


@pytest.mark.parametrize("failing", ["write", "fsync"])
def test_a_full_disk_stops_the_run_safely_and_it_resumes(tmp_path: Path, failing: str,
                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """The 30th write (or fsync) of the run fails: the run raises JournalError, the rig is at
    its safe set-points, the journal holds whole records only (no half line); once the disk is
    writable again, --resume finishes the run with the journal's invariants intact."""
    rig = LocalRig(SimulatedDriver(SimulatedRig(load_sim_config(SIM_CONFIG), 7)))
    config = small_config()
    run = tmp_path / "run"
    calls = {"n": 0}
    real = getattr(os, failing)

    def full(*args: object) -> object:
        calls["n"] += 1
        if calls["n"] >= 30:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(*args)

    monkeypatch.setattr(journal_module.os, failing, full)
    with pytest.raises(JournalError, match="No space left on device"):
        runner.calibrate(rig, config, run, store=tmp_path / "good.json")
    monkeypatch.setattr(journal_module.os, failing, real)
    records, damage = read_journal_prefix(run / JOURNAL_NAME)
    assert damage is None and (run / JOURNAL_NAME).read_bytes().endswith(b"\n")
    assert len(records) >= 20
    assert dict(rig.status().setpoints) == dict(rig.describe().safe_setpoints)
    result = runner.calibrate(rig, config, run, resume=True, store=tmp_path / "good.json")
    after = read_journal(run / JOURNAL_NAME)
    assert after[:len(records)] == records
    check_invariants(after)
    assert result["status"] == after[-1]["status"]
