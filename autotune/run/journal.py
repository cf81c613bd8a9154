"""The run folder: manifest, append-only JSON Lines journal, result file.

One folder per run::

    RUN_DIR/
      manifest.json    written once at the start: run id, command, full config, seed,
                       versions, the rig's describe reply
      journal.jsonl    one JSON object per line, appended and flushed to disk (fsync) at every
                       record: proposals, moves, acquisitions, estimates, decisions, the end
      log.jsonl        structlog's JSON log of the run (configured by the CLI)
      result.json      written once at the end (atomically): chosen set-points, inversion with
                       interval, phase shift, absorption, contrasts, shots and rig time used

Every journal record has ``seq`` (0, 1, 2, ... without gaps), ``type`` and ``t_wall`` (UTC ISO
8601). A run killed mid-write can leave a partial last line; :func:`open_for_resume` keeps
that fragment in ``journal.jsonl.partial`` and truncates the journal to its last complete
record before appending again, so a resumed journal is always valid JSON Lines.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from autotune.errors import JournalError, RunAlreadyEnded
from autotune.run.records import End, check_fields, parse

__all__ = [
    "Journal",
    "JOURNAL_NAME",
    "MANIFEST_NAME",
    "RESULT_NAME",
    "LOG_NAME",
    "read_journal",
    "read_journal_prefix",
    "JournalDamage",
    "ended_result",
    "ended_error",
    "already_ended",
    "read_json",
    "write_json_atomic",
    "utc_now",
]

JOURNAL_NAME = "journal.jsonl"
MANIFEST_NAME = "manifest.json"
RESULT_NAME = "result.json"
LOG_NAME = "log.jsonl"

#: End statuses after which a run may be continued with ``--resume`` (it did not finish).
RESUMABLE = frozenset({"interrupted", "aborted", "failed", "store_failed"})


def utc_now() -> str:
    """The current UTC time as ISO 8601 with a ``Z``-free ``+00:00`` offset."""
    return datetime.now(UTC).isoformat(timespec="milliseconds")


def _to_json(obj: Any) -> str:
    # allow_nan=False: a NaN in a record is a bug upstream and must not be written silently.
    try:
        return json.dumps(obj, allow_nan=False, separators=(",", ":"), default=_json_default)
    except ValueError as exc:
        raise JournalError(f"record is not finite JSON: {exc}") from exc


def _json_default(obj: Any) -> Any:
    # numpy scalars and arrays reach the journal from the analysis; Paths from the config.
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot write {type(obj).__name__} to the journal")


def write_json_atomic(path: Path, obj: Any) -> None:
    """Write ``obj`` as indented JSON to ``path`` through a temporary file and a rename."""
    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    try:
        text = json.dumps(obj, allow_nan=False, indent=2, default=_json_default)
        with tmp.open("w", encoding="utf-8") as handle:
            handle.write(text + "\n")
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except (OSError, ValueError, TypeError) as exc:
        raise JournalError(f"cannot write {path}: {exc}") from exc


def read_json(path: Path) -> Any:
    """Read a JSON file, raising :class:`JournalError` with the path on failure."""
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise JournalError(f"{path}: no such file") from exc
    except (OSError, ValueError) as exc:
        raise JournalError(f"{path}: not readable JSON ({exc})") from exc


def ended_result(run_dir: Path) -> dict[str, Any] | None:
    """The ``result.json`` of a run that ended, or None when it has none (or it is unreadable)."""
    try:
        result = read_json(Path(run_dir) / RESULT_NAME)
    except JournalError:
        return None
    return result if isinstance(result, dict) else None


def ended_error(run_dir: Path, records: list[dict[str, Any]], word: str = "run"
                ) -> RunAlreadyEnded | None:
    """The :class:`RunAlreadyEnded` of a journal whose last record ends it with a final status
    (one not in :data:`RESUMABLE`), with the folder's result; None when it may be resumed."""
    last = parse(records[-1]) if records else None
    if not isinstance(last, End) or last.status in RESUMABLE:
        return None
    return RunAlreadyEnded(f"{run_dir}: the {word} already ended ({last.status}); "
                           f"nothing to resume", last.status, ended_result(run_dir))


def already_ended(run_dir: Path, command: str) -> RunAlreadyEnded | None:
    """For a resume: the :func:`ended_error` of a ``command`` run that has its result, read
    from the folder alone (no rig needed); None otherwise (the resume then goes on and checks
    everything)."""
    run_dir = Path(run_dir)
    try:
        if read_json(run_dir / MANIFEST_NAME).get("command") != command:
            return None
        records = read_journal(run_dir / JOURNAL_NAME)
    except (JournalError, AttributeError):
        return None
    ended = ended_error(run_dir, records, "night" if command == "track" else "run")
    return ended if ended is not None and ended.result is not None else None


def _iter_lines(path: Path) -> Iterator[tuple[int, bytes]]:
    with path.open("rb") as handle:
        offset = 0
        for line in handle:
            yield offset, line
            offset += len(line)


@dataclass(frozen=True)
class JournalDamage:
    """The first damaged line of a journal: where it is, and what was found there.

    Attributes
    ----------
    path : Path
        The journal.
    line : int
        Its line number, from 1.
    expected_seq : int
        The ``seq`` the line should have carried (the number of good records before it).
    kind : {"gap", "repeat", "not_json", "not_record"}
        ``gap``: a larger ``seq`` (records missing); ``repeat``: a smaller one (a ``seq``
        written twice, typically by two processes); ``not_json``: the line is not JSON (two
        writes mixed into one line, or a write cut and written after); ``not_record``: JSON,
        but not an object with an integer ``seq``.
    found : str
        What was found, in words (``"seq 122"``, ``"text that is not JSON: ..."``).
    """

    path: Path
    line: int
    expected_seq: int
    kind: str
    found: str

    @property
    def cause(self) -> str:
        """The likely cause of this kind of damage, in words."""
        return {
            "gap": "records are missing",
            "repeat": "a record number written twice, as two processes writing one journal do",
            "not_json": "two writes mixed into one line, or a write cut short and written after",
            "not_record": "a line that is not a journal record",
        }[self.kind]

    def where(self) -> str:
        """Where and what, in one clause: line, expected, found, cause."""
        return (f"{self.path} line {self.line}: expected record seq {self.expected_seq}, "
                f"found {self.found} ({self.cause})")


def _found(line: bytes, record: Any) -> tuple[str, str]:
    """The kind of damage of a line read where another record was expected, and its words."""
    if record is _NOT_JSON:
        text = line.decode("utf-8", "replace").strip()
        shown = text if len(text) <= 60 else text[:57] + "..."
        return "not_json", f"text that is not JSON: {shown}"
    seq = record.get("seq") if isinstance(record, dict) else None
    if isinstance(seq, bool) or not isinstance(seq, int):
        return "not_record", ("an object without an integer seq" if isinstance(record, dict)
                              else f"a JSON {type(record).__name__}, not an object")
    return "", f"seq {seq}"


_NOT_JSON = object()


def read_journal_prefix(path: Path) -> tuple[list[dict[str, Any]], JournalDamage | None]:
    """The complete records of a journal up to its first damaged line, and that damage.

    Readers that must show what there is (``report``) use this; :func:`read_journal` refuses
    a damaged journal. A last line without its newline (a write cut by a kill or a full disk)
    is not damage: it is left out, as the writer had not finished it.

    Returns
    -------
    records : list of dict
        Records with ``seq`` 0, 1, 2, ... in order, before the first damaged line.
    damage : JournalDamage or None
        The first damaged line, None for an undamaged journal.

    Raises
    ------
    JournalError
        The journal does not exist or cannot be read.
    """
    path = Path(path)
    records: list[dict[str, Any]] = []
    try:
        for number, (_, line) in enumerate(_iter_lines(path), start=1):
            if not line.endswith(b"\n"):
                break
            try:
                record: Any = json.loads(line)
            except ValueError:
                record = _NOT_JSON
            kind, found = _found(line, record)
            if not kind:
                seq = record["seq"]
                if seq == len(records):
                    records.append(record)
                    continue
                kind = "gap" if seq > len(records) else "repeat"
            return records, JournalDamage(path, number, len(records), kind, found)
    except FileNotFoundError as exc:
        raise JournalError(f"{path}: no such journal") from exc
    except OSError as exc:
        raise JournalError(f"{path}: cannot be read ({exc})") from exc
    return records, None


def read_journal(path: Path) -> list[dict[str, Any]]:
    """All complete records of a journal, in order.

    A last line without its newline (a write cut by a kill) is ignored; any other line that is
    not a JSON object, a gap or a repeat in ``seq``, raises :class:`JournalError` in one
    sentence naming the line, what was expected and found, and what can be done.
    """
    records, damage = read_journal_prefix(path)
    if damage is not None:
        raise JournalError(
            f"{damage.where()}; this journal cannot be continued: 'autotune report "
            f"{damage.path.parent}' shows its {damage.expected_seq} records before line "
            f"{damage.line}, and a new run (--out) starts afresh")
    return records


class Journal:
    """An open, append-only journal in a run folder.

    Use :meth:`create` for a new run and :meth:`open_for_resume` to continue one.
    """

    def __init__(self, run_dir: Path, next_seq: int) -> None:
        self.run_dir = Path(run_dir)
        self.path = self.run_dir / JOURNAL_NAME
        self._seq = next_seq
        self._failure: str | None = None
        try:
            # Unbuffered bytes: a record is one write, and a failed one can be taken back.
            self._handle = self.path.open("ab", buffering=0)
        except OSError as exc:
            raise JournalError(f"cannot open {self.path} for appending: {exc}") from exc

    @classmethod
    def create(cls, run_dir: Path, manifest: Mapping[str, Any]) -> Journal:
        """Make a new run folder with its manifest and an empty journal.

        Raises
        ------
        JournalError
            The folder already holds a journal (never overwrite a run) or cannot be written.
        """
        run_dir = Path(run_dir)
        if (run_dir / JOURNAL_NAME).exists():
            raise JournalError(f"{run_dir} already holds a run; use --resume or another folder")
        try:
            run_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise JournalError(f"cannot create run folder {run_dir}: {exc}") from exc
        write_json_atomic(run_dir / MANIFEST_NAME, dict(manifest))
        return cls(run_dir, 0)

    @classmethod
    def open_for_resume(cls, run_dir: Path) -> tuple[Journal, dict[str, Any], list[dict[str, Any]]]:
        """Reopen a run folder: its manifest, its complete records, and a journal to append to.

        Raises
        ------
        JournalError
            No manifest or journal, a damaged record, or the run already finished (an end
            record whose status is not in :data:`RESUMABLE`).
        """
        run_dir = Path(run_dir)
        manifest = read_json(run_dir / MANIFEST_NAME)
        path = run_dir / JOURNAL_NAME
        records = read_journal(path)
        if (ended := ended_error(run_dir, records)) is not None:
            raise ended
        complete = sum(len(line) for _, line in _iter_lines(path)
                       if line.endswith(b"\n"))
        size = path.stat().st_size
        if size > complete:
            with path.open("rb") as handle:
                handle.seek(complete)
                fragment = handle.read()
            with (run_dir / (JOURNAL_NAME + ".partial")).open("ab") as keep:
                keep.write(fragment + b"\n")
            with path.open("r+b") as handle:
                handle.truncate(complete)
        return cls(run_dir, len(records)), manifest, records

    @property
    def next_seq(self) -> int:
        """Sequence number the next record will get."""
        return self._seq

    def append(self, record_type: str, **fields: Any) -> dict[str, Any]:
        """Append one record and flush it to disk before returning it.

        Raises
        ------
        JournalError
            The record does not fit its type (:func:`autotune.run.records.check_fields`:
            nothing is written), or the disk refused the write.
        """
        if self._failure is not None:
            raise JournalError(f"cannot append to {self.path}: an earlier write failed "
                               f"({self._failure}); the run stops here and can be resumed once "
                               f"the disk is writable")
        if self._handle.closed:
            raise JournalError(f"{self.path} is closed")
        record = {"seq": self._seq, "type": record_type, "t_wall": utc_now(), **fields}
        text = _to_json(record)
        # Its type's fields, as a reader will see them (autotune.run.records): a writer's bug
        # is refused here, before the disk, not found by a resume or a report.
        check_fields(json.loads(text))
        data = (text + "\n").encode("utf-8")
        fd = self._handle.fileno()
        try:
            before = os.fstat(fd).st_size
        except OSError as exc:
            raise JournalError(f"cannot append to {self.path}: {exc}") from exc
        try:
            written = 0
            while written < len(data):
                written += os.write(fd, data[written:])
            os.fsync(fd)
        except OSError as exc:
            # A full disk or a failed fsync: take the part written back, so that the next
            # append (the end record, a resume) does not follow half a line.
            try:
                os.ftruncate(fd, before)
            except OSError:
                pass  # the cut line stays last; readers and resumes leave it out
            # After a failed write or fsync what reached the disk is uncertain (a retried fsync
            # may report success without writing): this journal takes no further record.
            self._failure = exc.strerror or str(exc)
            self._handle.close()
            raise JournalError(f"cannot append to {self.path}: {exc}; the run stops here and "
                               f"can be resumed once the disk is writable") from exc
        self._seq += 1
        return record

    def close(self) -> None:
        """Close the file (records already written stay on disk)."""
        if not self._handle.closed:
            self._handle.close()

    def __enter__(self) -> Journal:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

