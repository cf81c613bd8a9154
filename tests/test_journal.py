"""Tests of autotune.run.journal: append-only JSON Lines that survive a kill mid-write."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from autotune.errors import JournalError
from autotune.run.journal import JOURNAL_NAME, Journal, read_journal


def test_records_are_numbered_and_on_disk_at_once(tmp_path: Path) -> None:
    """Each append is a complete JSON line on disk before append returns."""
    journal = Journal.create(tmp_path / "run", {"command": "calibrate"})
    journal.append("proposal", point=0, setpoints={"velocity": 500.0})
    lines = (tmp_path / "run" / JOURNAL_NAME).read_text().splitlines()
    assert json.loads(lines[0])["seq"] == 0
    journal.append("estimate", point=0)
    journal.close()
    assert [r["type"] for r in read_journal(tmp_path / "run" / JOURNAL_NAME)] == [
        "proposal", "estimate"]


def test_nan_is_refused(tmp_path: Path) -> None:
    """JSON has no NaN (RFC 8259): a non-finite value is an error, not a corrupt line."""
    journal = Journal.create(tmp_path / "run", {})
    with pytest.raises(JournalError, match="not finite"):
        journal.append("estimate", inversion=float("nan"))
    journal.close()
    assert read_journal(tmp_path / "run" / JOURNAL_NAME) == []


def test_resume_truncates_a_partial_last_line_and_keeps_it(tmp_path: Path) -> None:
    """A write cut by a kill is kept aside and the journal continues with the next seq."""
    run = tmp_path / "run"
    journal = Journal.create(run, {"command": "calibrate"})
    journal.append("proposal", point=0)
    journal.close()
    with (run / JOURNAL_NAME).open("a") as handle:
        handle.write('{"seq": 1, "type": "acqui')
    journal, manifest, records = Journal.open_for_resume(run)
    assert manifest == {"command": "calibrate"}
    assert len(records) == 1
    journal.append("acquisition", point=0)
    journal.close()
    assert [r["seq"] for r in read_journal(run / JOURNAL_NAME)] == [0, 1]
    assert "acqui" in (run / (JOURNAL_NAME + ".partial")).read_text()


def test_a_finished_run_cannot_be_resumed(tmp_path: Path) -> None:
    """Resuming a run whose end record says it finished is refused."""
    run = tmp_path / "run"
    journal = Journal.create(run, {})
    journal.append("end", status="accepted")
    journal.close()
    with pytest.raises(JournalError, match="already ended"):
        Journal.open_for_resume(run)


def test_a_run_folder_is_never_overwritten(tmp_path: Path) -> None:
    """Creating a run where a journal exists is refused."""
    Journal.create(tmp_path / "run", {}).close()
    with pytest.raises(JournalError, match="already holds a run"):
        Journal.create(tmp_path / "run", {})


def test_a_gap_in_seq_is_damage(tmp_path: Path) -> None:
    """A journal whose records skip a number is reported, not silently accepted."""
    path = tmp_path / JOURNAL_NAME
    path.write_text('{"seq": 0, "type": "a"}\n{"seq": 2, "type": "b"}\n')
    with pytest.raises(JournalError, match="expected record seq 1"):
        read_journal(path)
