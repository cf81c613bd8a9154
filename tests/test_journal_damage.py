"""A damaged journal is read, not refused: ``report`` shows what precedes the damage and says
where and what it is; ``--resume`` refuses a gap or a repeat in one sentence. Real processes,
a real rig, journals damaged the ways two writers or a full disk damage them."""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import pytest

from autotune.run.journal import JOURNAL_NAME, RESULT_NAME, read_journal, read_journal_prefix
from cli_helpers import autotune, tiny_config
from rig_process import spawn_server

#: The first damaged line of each damaged journal (1-based); the records before it are good.
_AT = 12


def _lines(run: Path) -> list[bytes]:
    return (run / JOURNAL_NAME).read_bytes().splitlines(keepends=True)


def _gap(lines: list[bytes]) -> list[bytes]:
    return lines[:_AT - 1] + lines[_AT:]


def _repeat(lines: list[bytes]) -> list[bytes]:
    # A second writer that opened the journal a few records ago appends its own record there.
    return lines[:_AT - 1] + [lines[_AT - 4]] + lines[_AT - 1:]


def _interleaved(lines: list[bytes]) -> list[bytes]:
    # Two writers' halves in one line: the first half of one record, then another whole record.
    half = len(lines[_AT - 1]) // 2
    return (lines[:_AT - 1] + [lines[_AT - 1][:half] + lines[_AT]] + [lines[_AT - 1][half:]]
            + lines[_AT + 1:])


def _cut_then_written(lines: list[bytes]) -> list[bytes]:
    # A full disk cut a record short; once space came back, records went on after it.
    return lines[:_AT - 1] + [lines[_AT - 1][:20] + lines[_AT]] + lines[_AT + 1:]


_DAMAGE = {"gap": (_gap, "gap", "records are missing"),
           "repeat": (_repeat, "repeat", "written twice"),
           "interleaved halves": (_interleaved, "not_json", "two writes mixed into one line"),
           "cut and written after": (_cut_then_written, "not_json", "cut short")}


#: The tests of this module share an expensive module-scoped fixture: one worker runs them
#: all (pytest-xdist's loadgroup), so that it is built once.
pytestmark = pytest.mark.xdist_group("test_journal_damage")


@pytest.fixture(scope="module")
def stopped_run(tmp_path_factory: pytest.TempPathFactory) -> Any:
    """A rig, a config, and the folder of a calibration cut before its end (as if killed)."""
    tmp = tmp_path_factory.mktemp("damage")
    server = spawn_server(tmp, "rig", seed=3)
    try:
        config = tiny_config(tmp / "c.toml", server.endpoint, tmp / "good.json")
        run = tmp / "run"
        done = autotune("calibrate", "--config", str(config), "--out", str(run), "--quiet")
        assert done.returncode == 0, done.stderr[-3000:]
        (run / RESULT_NAME).unlink()
        lines = _lines(run)
        assert len(lines) > _AT + 10
        (run / JOURNAL_NAME).write_bytes(b"".join(lines[:_AT + 10]))
        yield config, run
    finally:
        server.stop()


def _damaged(tmp_path: Path, run: Path, how: str) -> Path:
    copy = tmp_path / "run"
    shutil.copytree(run, copy)
    damage = _DAMAGE[how][0]
    (copy / JOURNAL_NAME).write_bytes(b"".join(damage(_lines(copy))))
    return copy


@pytest.mark.parametrize("how", sorted(_DAMAGE))
def test_a_damaged_journal_reads_up_to_its_damage(tmp_path: Path, stopped_run: Any,
                                                  how: str) -> None:
    """The reader keeps every record before the first damaged line and names its line, the
    seq expected there, what was found and the likely cause."""
    _, run = stopped_run
    copy = _damaged(tmp_path, run, how)
    records, damage = read_journal_prefix(copy / JOURNAL_NAME)
    assert [r["seq"] for r in records] == list(range(_AT - 1))
    assert damage is not None
    assert (damage.line, damage.expected_seq, damage.kind) == (_AT, _AT - 1, _DAMAGE[how][1])
    assert _DAMAGE[how][2] in damage.where()


@pytest.mark.parametrize("how", sorted(_DAMAGE))
def test_report_shows_a_damaged_journal_and_resume_refuses_it_in_one_sentence(
        tmp_path: Path, stopped_run: Any, how: str) -> None:
    """report: exit 0, a note with the line, the expected seq and what was found, the records
    before it shown; --resume: exit 2 with one sentence (line, expected, found, what to do),
    never a bytes repr, and the journal left as it was."""
    config, run = stopped_run
    copy = _damaged(tmp_path, run, how)
    before = (copy / JOURNAL_NAME).read_bytes()
    report = autotune("report", str(copy), "--no-plot", timeout=120)
    assert report.returncode == 0, report.stderr[-3000:]
    note = next(line for line in report.stdout.splitlines() if line.startswith("NOTE:"))
    assert f"line {_AT}: expected record seq {_AT - 1}, found " in note
    assert f"shows the {_AT - 1} records before it" in note
    resumed = autotune("calibrate", "--config", str(config), "--resume", str(copy), timeout=120)
    assert resumed.returncode == 2, resumed.stderr[-3000:]
    message = resumed.stderr.strip().splitlines()[-1]
    assert f"line {_AT}: expected record seq {_AT - 1}, found " in message
    assert "a new run (--out)" in message and "autotune report" in message
    assert "b'" not in resumed.stderr and 'b"' not in resumed.stderr
    assert "CAUTION" not in resumed.stderr
    assert (copy / JOURNAL_NAME).read_bytes() == before


def test_a_journal_cut_by_a_full_disk_is_reported_and_resumed(tmp_path: Path,
                                                              stopped_run: Any) -> None:
    """A last record cut short (a kill, a full disk) is not damage: report shows the records
    before it, and --resume keeps the fragment aside and finishes the run."""
    config, run = stopped_run
    copy = tmp_path / "run"
    shutil.copytree(run, copy)
    lines = _lines(copy)
    (copy / JOURNAL_NAME).write_bytes(b"".join(lines[:-1]) + lines[-1][:15])
    report = autotune("report", str(copy), "--no-plot", timeout=120)
    assert report.returncode == 0, report.stderr[-3000:]
    assert "NOTE:" not in report.stdout and "ends mid-line" in report.stdout
    resumed = autotune("calibrate", "--config", str(config), "--resume", str(copy), "--quiet")
    assert resumed.returncode == 0, resumed.stderr[-3000:]
    assert (copy / (JOURNAL_NAME + ".partial")).read_bytes() == lines[-1][:15] + b"\n"
    assert read_journal(copy / JOURNAL_NAME)[-1]["status"] == "accepted"
