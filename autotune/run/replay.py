"""A stage's journal records read back for a resume: the measurements (with their requests
still pending), estimates, proposals and decisions (:func:`replay_records`), and the shots
and rig time already spent.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from autotune.errors import JournalError
from autotune.analysis.fringe import InversionEstimate
from autotune.run.records import (Acquisition, Amend, Decision, Discarded, Estimate,
                                  MeasurementOpened, Proposal, Record, Refused, Request,
                                  StageHeader, of_type, parse_all)
from autotune.run.session import Measurement, Tally

__all__ = ["Replayed", "replay_records", "measured_estimates", "tally_from"]


@dataclass
class Replayed:
    """What a stage's journal records say, rebuilt for a resume."""

    header: dict[str, Any] = field(default_factory=dict)
    measurements: dict[tuple[str, int], Measurement] = field(default_factory=dict)
    estimates: dict[tuple[str, int], dict[str, Any]] = field(default_factory=dict)
    estimate_order: list[tuple[str, int]] = field(default_factory=list)
    proposals: dict[int, dict[str, float]] = field(default_factory=dict)
    decisions: dict[str, dict[str, Any]] = field(default_factory=dict)


def replay_records(records: Iterable[Mapping[str, Any]]) -> Replayed:
    """Rebuild measurements, estimates, proposals and decisions from journal records.

    Raises
    ------
    JournalError
        A record refers to a measurement the journal never opened, or an acquisition appears
        twice (both mean a damaged journal).
    """
    out = Replayed()
    for rec in parse_all(records):  # a record that does not fit its type: a damaged journal
        if isinstance(rec, StageHeader):
            out.header = rec.as_dict()
        elif isinstance(rec, MeasurementOpened):
            out.measurements[(rec.label, rec.point)] = Measurement(
                rec.label, rec.point, dict(rec.setpoints), rec.shots_per_phase)
        elif isinstance(rec, Amend):
            opened(out, rec, rec.label, rec.point).shots_per_phase = rec.shots_per_phase
        elif isinstance(rec, Request) and rec.op == "acquire":
            if rec.label is None or rec.point is None or rec.field is None \
                    or rec.phase_index is None or rec.shots is None:
                raise JournalError(f"journal record {rec.seq}: a request to acquire without "
                                   f"its label, point, field, phase index and shots")
            m = opened(out, rec, rec.label, rec.point)
            m.pending[(rec.field, rec.phase_index)] = (rec.msg_id, rec.shots)
        elif isinstance(rec, (Acquisition, Discarded, Refused)):
            m = opened(out, rec, rec.label, rec.point)
            slot = (rec.field, rec.phase_index)
            m.pending.pop(slot, None)
            if isinstance(rec, Acquisition):
                if slot in m.counts:
                    raise JournalError(f"journal record {rec.seq}: acquisition "
                                       f"{(rec.label, rec.point)} {slot} appears twice")
                m.counts[slot] = (rec.counts.e, rec.counts.g, rec.counts.i)
                m.note_times(rec.t_start, rec.t_end)
        elif isinstance(rec, Estimate):
            key = (rec.label, rec.point)
            if key not in out.estimates:
                out.estimate_order.append(key)
            out.estimates[key] = rec.as_dict()
        elif isinstance(rec, Proposal):
            out.proposals[rec.point] = dict(rec.setpoints)
        elif isinstance(rec, Decision):
            out.decisions[rec.what] = rec.as_dict()
    return out


def opened(out: Replayed, rec: Record, label: str, point: int) -> Measurement:
    """The measurement a record refers to; one the journal never opened is damage."""
    m = out.measurements.get((label, point))
    if m is None:
        article = "an" if rec.type[0] in "aeiou" else "a"
        raise JournalError(f"journal record {rec.seq}: {article} {rec.type} for measurement "
                           f"{(label, point)} that was never opened")
    return m


def measured_estimates(replayed: Replayed) -> list[tuple[str, dict[str, float], InversionEstimate]]:
    """The estimates a journal holds, as (label, set-points, estimate), in their order."""
    return [(key[0], dict(replayed.estimates[key]["setpoints"]),
             InversionEstimate.from_dict(replayed.estimates[key]["estimate"]))
            for key in replayed.estimate_order]


def tally_from(records: Iterable[Mapping[str, Any]]) -> Tally:
    """The shots and rig time the acquisitions of these records spent."""
    tally = Tally()
    for rec in of_type(parse_all(records), Acquisition):
        tally.shots += rec.shots
        tally.rig_time_s += rec.t_end - rec.t_start
    return tally
