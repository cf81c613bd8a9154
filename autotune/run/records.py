"""The journal's records, typed: one class per record type, written and read through here.

A journal line is a JSON object with ``seq``, ``type`` and ``t_wall`` and the fields of its
type. This module declares each type once, as a frozen pydantic (v2) model tagged by its
``type`` (a tagged union: :data:`KINDS` maps the tag to its class), and is the one way in and
out:

- :func:`check_fields` is called by :meth:`autotune.run.journal.Journal.append` before a line
  is written: a record with a field missing or of the wrong type is a bug of its writer and is
  refused (:class:`~autotune.errors.JournalError` naming the type and the field) before it can
  reach the disk;
- :func:`parse` and :func:`parse_all` turn what :func:`autotune.run.journal.read_journal` read
  back into typed records for every reader (a resume's replay, the night, the report, the
  study). A record that does not fit its type is a damaged journal: the error names its ``seq``,
  its type and the field.

Fields a type does not declare are kept (``extra="allow"``), read as attributes: a decision
carries the numbers of its own kind, and a journal written by a later version, with fields
this one does not know, still reads. A type this version does not know reads as
:class:`Other` (the report counts them; nothing else acts on them).

Writing is unchanged on disk: the line is the writer's dict as JSON, in its key order.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any, Literal, TypeVar

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from autotune.errors import JournalError

__all__ = [
    "Record", "Other", "Start", "End", "StageHeader", "MeasurementOpened", "Amend", "Request",
    "Counts", "Acquisition", "Discarded", "Refused", "Estimate", "Proposal", "Move",
    "MoveUnconfirmed", "Safe", "SafeFailed", "RigRestarted", "Decision", "Wait", "Hold",
    "KINDS", "check_fields", "parse", "parse_all", "of_type", "decisions",
]

R = TypeVar("R", bound="Record")
SetPoints = dict[str, float]


class Record(BaseModel):
    """What every record has: its place, its type, its UTC wall time."""

    model_config = ConfigDict(extra="allow", frozen=True)

    seq: int = Field(ge=0)
    type: str
    t_wall: str

    def get(self, name: str, default: Any = None) -> Any:
        """A field by name (declared or kept), or ``default``: for the readers of optional
        and kind-specific fields (a decision's numbers)."""
        value = getattr(self, name, default)
        return default if value is None else value

    def as_dict(self) -> dict[str, Any]:
        """The record as the JSON object it was written as."""
        return self.model_dump(mode="json", exclude_unset=True)


class Other(Record):
    """A record of a type this version does not know (kept; the report counts them)."""


class Start(Record):
    """A run (or a resumed run) started: the rig's clock, the command, the rig's instance."""

    type: Literal["start"]
    clock: float | None = None
    command: str
    instance: str | None = None


class End(Record):
    """The run ended, with its status (``done``, ``interrupted``, ...)."""

    type: Literal["end"]
    status: str


class StageHeader(Record):
    """A stage began: its name, search box, first points, budget, strategy, seed."""

    type: Literal["stage"]
    stage: str
    box: dict[str, list[float]]
    initial_points: list[SetPoints]
    budget: dict[str, Any]
    strategy: str
    seed: int
    start: SetPoints | None = None
    prior: dict[str, Any] | None = None


class MeasurementOpened(Record):
    """A measurement was opened (write-ahead): its label, number, set-points and shots."""

    type: Literal["measurement"]
    label: str
    point: int
    setpoints: SetPoints
    shots_per_phase: int = Field(gt=0)


class Amend(Record):
    """A measurement not started yet takes the present configuration's shots per phase."""

    type: Literal["amend"]
    label: str
    point: int
    shots_per_phase: int = Field(gt=0)
    reason: str


class Request(Record):
    """A request about to be sent to the rig (write-ahead), named by its ``msg_id``."""

    type: Literal["request"]
    op: Literal["apply", "safe", "acquire"]
    msg_id: str
    reason: str | None = None
    setpoints: SetPoints | None = None
    label: str | None = None
    point: int | None = None
    field: str | None = None
    phase_index: int | None = None
    ramsey_phase: float | None = None
    shots: int | None = None


class Counts(BaseModel):
    """Detection counts of one acquisition: atoms found in e, in g, and not identified."""

    model_config = ConfigDict(frozen=True)

    e: int = Field(ge=0)
    g: int = Field(ge=0)
    i: int = Field(ge=0)


class Acquisition(Record):
    """The counts of one (field state, Ramsey phase) of a measurement, with rig times."""

    type: Literal["acquisition"]
    label: str
    point: int
    field: str
    phase_index: int = Field(ge=0)
    ramsey_phase: float
    shots: int = Field(ge=0)
    counts: Counts
    t_start: float
    t_end: float
    setpoints: SetPoints
    msg_id: str | None = None


class Discarded(Record):
    """A reply that was received and not used (it did not match the request)."""

    type: Literal["discarded"]
    msg_id: str
    label: str
    point: int
    field: str
    phase_index: int
    shots: int | None = None
    counts: Counts | None = None
    setpoints: SetPoints | None = None
    reason: str


class Refused(Record):
    """The rig refused an acquisition (its kind and detail)."""

    type: Literal["refused"]
    op: str
    msg_id: str
    label: str
    point: int
    field: str
    phase_index: int
    kind: str
    detail: str | None = None


class Estimate(Record):
    """A measurement's estimate (inversion, phase shift, absorption ...) and its rig time."""

    type: Literal["estimate"]
    label: str
    point: int
    setpoints: SetPoints
    clock_s: float | None = None
    estimate: dict[str, Any]


class Proposal(Record):
    """The search's next point (before the move)."""

    type: Literal["proposal"]
    point: int
    setpoints: SetPoints
    strategy: str
    purpose: str | None = None
    reason: str | None = None
    shots_per_phase: int | None = None


class Move(Record):
    """A guarded step applied: asked for, in force, the rig's clock."""

    type: Literal["move"]
    setpoints: SetPoints
    applied: SetPoints
    clock: float | None = None
    reason: str
    msg_id: str | None = None
    reconciled: bool | None = None


class MoveUnconfirmed(Record):
    """A step whose outcome is not known (refused, or its reply never came)."""

    type: Literal["move_unconfirmed"]
    setpoints: SetPoints
    msg_id: str
    reason: str
    in_force: SetPoints | None = None
    clock: float | None = None
    refused: str | None = None


class Safe(Record):
    """The rig is at its safe set-points."""

    type: Literal["safe"]
    setpoints: SetPoints
    reason: str
    msg_id: str | None = None
    reconciled: bool | None = None


class SafeFailed(Record):
    """Sending the rig to its safe set-points failed (the error says how)."""

    type: Literal["safe_failed"]
    reason: str
    error: str
    msg_id: str | None = None
    reconciled: bool | None = None


class RigRestarted(Record):
    """The rig restarted (a new instance) and was described again."""

    type: Literal["rig"]
    instance: str | None = None
    reason: str


class Decision(Record):
    """A decision of the run, ``what`` with its ``reason`` and its own numbers (kept)."""

    type: Literal["decision"]
    what: str
    reason: str = ""


class Wait(Record):
    """The night waits for the rig clock (write-ahead), named by its check or retry."""

    type: Literal["wait"]
    from_clock: float
    until_clock: float
    reason: str
    how: Literal["advance", "wall"]


class Hold(Record):
    """A night's snapshot: the whole state of the hold after a check."""

    type: Literal["hold"]
    state: dict[str, Any]


#: The tagged union: a record's ``type`` and its class.
KINDS: dict[str, type[Record]] = {
    cls.model_fields["type"].annotation.__args__[0]: cls  # type: ignore[union-attr]
    for cls in (Start, End, StageHeader, MeasurementOpened, Amend, Request, Acquisition,
                Discarded, Refused, Estimate, Proposal, Move, MoveUnconfirmed, Safe, SafeFailed,
                RigRestarted, Decision, Wait, Hold)
}


def _problem(error: ValidationError) -> str:
    first = error.errors()[0]
    where = ".".join(str(p) for p in first["loc"]) or "record"
    more = f" (and {error.error_count() - 1} more)" if error.error_count() > 1 else ""
    got = "" if first["type"] == "missing" else f", got {first.get('input')!r}"
    return f"{where}: {first['msg'].lower()}{got}{more}"


def check_fields(record: Mapping[str, Any]) -> None:
    """Refuse a record about to be written whose type is unknown or whose fields do not fit it.

    ``record`` is the JSON object as it will be read back (plain JSON values).

    Raises
    ------
    JournalError
        Naming the record's type and the first field that does not fit.
    """
    kind = record.get("type")
    cls = KINDS.get(kind)  # type: ignore[arg-type]
    if cls is None:
        raise JournalError(f"journal record type {kind!r} is not one of {sorted(KINDS)}")
    try:
        cls.model_validate(record)
    except ValidationError as exc:
        raise JournalError(f"journal record {kind!r} not written: {_problem(exc)}") from exc


def parse(record: Mapping[str, Any]) -> Record:
    """One record read back, typed (:class:`Other` for a type this version does not know).

    Raises
    ------
    JournalError
        The record does not fit its type: a damaged journal (its ``seq``, type and field).
    """
    kind = record.get("type")
    cls = KINDS.get(kind, Other) if isinstance(kind, str) else Other
    try:
        return cls.model_validate(record)
    except ValidationError as exc:
        raise JournalError(f"journal record seq {record.get('seq')} ({kind}) is damaged: "
                           f"{_problem(exc)}") from exc


def parse_all(records: Iterable[Mapping[str, Any] | Record]) -> list[Record]:
    """Every record typed, in order (records already typed pass through)."""
    return [rec if isinstance(rec, Record) else parse(rec) for rec in records]


def of_type(records: Iterable[Record], cls: type[R]) -> list[R]:
    """The records of one type, in order."""
    return [rec for rec in records if isinstance(rec, cls)]


def decisions(records: Iterable[Record], *what: str) -> list[Decision]:
    """The decisions of the given kinds (all decisions when none is named), in order."""
    return [rec for rec in records
            if isinstance(rec, Decision) and (not what or rec.what in what)]
