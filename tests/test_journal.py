"""Tests of autotune.run.journal: append-only JSON Lines that survive a kill mid-write."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from autotune.errors import JournalError
from autotune.run import records
from autotune.run.journal import JOURNAL_NAME, Journal, read_journal


def test_records_are_numbered_and_on_disk_at_once(tmp_path: Path) -> None:
    """Each append is a complete JSON line on disk before append returns."""
    journal = Journal.create(tmp_path / "run", {"command": "calibrate"})
    journal.append("proposal", point=0, setpoints={"velocity": 500.0}, strategy="grid")
    lines = (tmp_path / "run" / JOURNAL_NAME).read_text().splitlines()
    assert json.loads(lines[0])["seq"] == 0
    journal.append("decision", what="stop_search", reason="budget")
    journal.close()
    assert [r["type"] for r in read_journal(tmp_path / "run" / JOURNAL_NAME)] == [
        "proposal", "decision"]


def test_nan_is_refused(tmp_path: Path) -> None:
    """JSON has no NaN (RFC 8259): a non-finite value is an error, not a corrupt line."""
    journal = Journal.create(tmp_path / "run", {})
    with pytest.raises(JournalError, match="not finite"):
        journal.append("decision", what="stop_search", reason="x", inversion=float("nan"))
    journal.close()
    assert read_journal(tmp_path / "run" / JOURNAL_NAME) == []


def test_resume_truncates_a_partial_last_line_and_keeps_it(tmp_path: Path) -> None:
    """A write cut by a kill is kept aside and the journal continues with the next seq."""
    run = tmp_path / "run"
    journal = Journal.create(run, {"command": "calibrate"})
    journal.append("proposal", point=0, setpoints={"velocity": 500.0}, strategy="grid")
    journal.close()
    with (run / JOURNAL_NAME).open("a") as handle:
        handle.write('{"seq": 1, "type": "acqui')
    journal, manifest, records = Journal.open_for_resume(run)
    assert manifest == {"command": "calibrate"}
    assert len(records) == 1
    journal.append("decision", what="resumed", reason="after a kill")
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


# ------------------------------------------------------------------ typed records (records.py)

def test_a_record_that_does_not_fit_its_type_is_refused_before_the_disk(tmp_path: Path) -> None:
    """A writer's bug (a field missing, of the wrong type, or an unknown type) is a JournalError
    naming the type and the field, and nothing is written (the next seq is unchanged)."""
    journal = Journal.create(tmp_path / "run", {})
    with pytest.raises(JournalError, match=r"'proposal' not written: strategy: field required"):
        journal.append("proposal", point=0, setpoints={"velocity": 500.0})
    with pytest.raises(JournalError, match=r"'acquisition' not written: .*counts"):
        journal.append("acquisition", label="point", point=0, field="empty", phase_index=0,
                       ramsey_phase=0.0, shots=10, counts={"e": 3, "g": "seven", "i": 0},
                       t_start=0.0, t_end=1.0, setpoints={})
    with pytest.raises(JournalError, match=r"type 'estimat' is not one of"):
        journal.append("estimat", label="point", point=0)
    assert journal.next_seq == 0
    journal.close()
    assert read_journal(tmp_path / "run" / JOURNAL_NAME) == []


def test_records_read_back_typed(tmp_path: Path) -> None:
    """What was written reads back as its type, with its fields as attributes; a decision's
    own numbers are kept; a type this version does not know reads as Other."""
    journal = Journal.create(tmp_path / "run", {})
    journal.append("acquisition", label="point", point=2, field="empty", phase_index=1,
                   ramsey_phase=1.5, shots=100, counts={"e": 30, "g": 60, "i": 10},
                   t_start=4.0, t_end=5.0, setpoints={"velocity": 500.0})
    journal.append("decision", what="alarm", reason="drift", point=3, z=2.5)
    journal.close()
    rows = read_journal(tmp_path / "run" / JOURNAL_NAME)
    rows.append({"seq": 2, "type": "from_a_later_version", "t_wall": "x", "n": 1})
    acq, dec, other = records.parse_all(rows)
    assert isinstance(acq, records.Acquisition) and acq.counts.g == 60 and acq.t_end == 5.0
    assert isinstance(dec, records.Decision) and dec.what == "alarm" and dec.get("z") == 2.5
    assert isinstance(other, records.Other) and other.get("n") == 1
    assert records.decisions([acq, dec, other], "alarm") == [dec]
    assert acq.as_dict() == rows[0]


def test_a_damaged_record_is_named_by_its_seq_and_field() -> None:
    """Reading back, a record that does not fit its type is a damaged journal: the error
    names its seq, its type and the field."""
    with pytest.raises(JournalError, match=r"seq 7 \(estimate\) is damaged: point"):
        records.parse({"seq": 7, "type": "estimate", "t_wall": "x", "label": "point",
                       "point": "seven", "setpoints": {}, "estimate": {}})
