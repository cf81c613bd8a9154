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
    requests: dict[str, tuple[tuple[str, int], str, int, int]] = {}
    for rec in records:
        kind = rec.get("type")
        if kind == "stage":
            out.header = dict(rec)
        elif kind == "measurement":
            key = (rec["label"], int(rec["point"]))
            out.measurements[key] = Measurement(rec["label"], int(rec["point"]),
                                                 dict(rec["setpoints"]),
                                                 int(rec["shots_per_phase"]))
        elif kind == "amend":
            out.measurements[(rec["label"], int(rec["point"]))].shots_per_phase = \
                int(rec["shots_per_phase"])
        elif kind == "request" and rec.get("op") == "acquire":
            key = (rec["label"], int(rec["point"]))
            if key not in out.measurements:
                raise JournalError(f"journal record {rec['seq']}: a request for measurement "
                                   f"{key} that was never opened")
            slot = (rec["field"], int(rec["phase_index"]))
            out.measurements[key].pending[slot] = (rec["msg_id"], int(rec["shots"]))
            requests[rec["msg_id"]] = (key, rec["field"], int(rec["phase_index"]),
                                       int(rec["shots"]))
        elif kind in ("acquisition", "discarded", "refused"):
            key = (rec["label"], int(rec["point"]))
            m = out.measurements.get(key)
            if m is None:
                raise JournalError(f"journal record {rec['seq']}: an {kind} for measurement "
                                   f"{key} that was never opened")
            slot = (rec["field"], int(rec["phase_index"]))
            m.pending.pop(slot, None)
            if kind == "acquisition":
                if slot in m.counts:
                    raise JournalError(f"journal record {rec['seq']}: acquisition {key} {slot} "
                                       f"appears twice")
                c = rec["counts"]
                m.counts[slot] = (int(c["e"]), int(c["g"]), int(c["i"]))
                m.note_times(float(rec["t_start"]), float(rec["t_end"]))
        elif kind == "estimate":
            key = (rec["label"], int(rec["point"]))
            if key not in out.estimates:
                out.estimate_order.append(key)
            out.estimates[key] = dict(rec)
        elif kind == "proposal":
            out.proposals[int(rec["point"])] = {k: float(v) for k, v in rec["setpoints"].items()}
        elif kind == "decision":
            out.decisions[str(rec.get("what"))] = dict(rec)
    return out


def measured_estimates(replayed: Replayed) -> list[tuple[str, dict[str, float], InversionEstimate]]:
    """The estimates a journal holds, as (label, set-points, estimate), in their order."""
    return [(key[0], dict(replayed.estimates[key]["setpoints"]),
             InversionEstimate.from_dict(replayed.estimates[key]["estimate"]))
            for key in replayed.estimate_order]


def tally_from(records: Iterable[Mapping[str, Any]]) -> Tally:
    tally = Tally()
    for rec in records:
        if rec.get("type") == "acquisition":
            tally.shots += int(rec["shots"])
            tally.rig_time_s += float(rec["t_end"]) - float(rec["t_start"])
    return tally
