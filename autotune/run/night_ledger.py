"""The night's ledger (the journal seen through, keeping the night's accounts of beam and
shots) and what a night's records say: a stage's records, its outcome, its estimates with
their shots."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from autotune.run.guard import holds_setpoints
from autotune.run.journal import Journal
from autotune.run.records import (Acquisition, Decision, Estimate, MeasurementOpened, Record,
                                  StageHeader, parse, parse_all)
from autotune.wire.rig import measurement_shots

__all__ = ["HOLD", "NightLedger", "stage_begun", "json_ready", "stage_records", "stage_outcome",
           "stage_estimates"]

# Measurement label of the night's checks.
HOLD = "hold"

class NightLedger:
    """The journal, seen through: every record passes, and the night keeps its accounts.

    Acquisitions are counted as the night's checks (label ``hold``) or as its stages (anything
    else); the last estimate record is kept (a stage's final clock).
    """

    def __init__(self, journal: Journal, records: Sequence[Mapping[str, Any]]) -> None:
        self._journal = journal
        self.check_beam_s = 0.0
        self.stage_beam_s_total = 0.0
        self.first_stage_beam_s = 0.0
        self.shots = 0
        self.stages_begun = 0
        self.first_stage_is_calibration = False
        self.stage_beam_s: dict[int, float] = {}
        self.stage_kind: dict[int, str] = {}
        self.last_estimate: Mapping[str, Any] | None = None
        self.records: list[Mapping[str, Any]] = []
        for rec in records:
            self._count(rec)

    def _count(self, rec: Mapping[str, Any]) -> None:
        self.records.append(rec)
        typed = parse(rec)
        if isinstance(typed, Acquisition):
            beam = typed.t_end - typed.t_start
            self.shots += typed.shots
            if typed.label == HOLD:
                self.check_beam_s += beam
            else:
                self.stage_beam_s_total += beam
                index = self.stages_begun - 1
                self.stage_beam_s[index] = self.stage_beam_s.get(index, 0.0) + beam
                if self.stages_begun == 1:
                    self.first_stage_beam_s += beam
        elif isinstance(typed, Estimate):
            self.last_estimate = rec
        elif (index := stage_begun(typed)) is not None:
            self.stages_begun = max(self.stages_begun, index + 1)
            self.stage_kind[index] = typed.what  # type: ignore[attr-defined]
            if index == 0:
                self.first_stage_is_calibration = typed.what == "calibrate"  # type: ignore[attr-defined]

    @property
    def holding_beam_s(self) -> float:
        """Beam time of holding: checks and stages, less a calibration the night began with."""
        first = self.first_stage_beam_s if self.first_stage_is_calibration else 0.0
        return self.check_beam_s + self.stage_beam_s_total - first

    def append(self, record_type: str, **fields: Any) -> dict[str, Any]:
        # A non-finite number is refused by the journal (a bug upstream, never written silently):
        # a recommendation's predicted value is made null where it is computed (autotune/run/stage.py, autotune/run/guided_stage.py).
        rec = self._journal.append(record_type, **fields)
        self._count(rec)
        return rec

    def __getattr__(self, name: str) -> Any:
        return getattr(self._journal, name)


def json_ready(value: Any) -> Any:
    """JSON-ready: nan and infinities as None, recursively."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, Mapping):
        return {str(k): json_ready(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_ready(v) for v in value]
    return value


def stage_begun(rec: Record) -> int | None:
    """The index of the stage a record begins (a ``retune`` or ``calibrate`` decision), or
    None."""
    if isinstance(rec, Decision) and rec.what in ("retune", "calibrate") \
            and isinstance(rec.get("index"), int):
        return int(rec.get("index"))
    return None


def _stage_span(records: Sequence[Mapping[str, Any]], index: int
                ) -> list[tuple[Mapping[str, Any], Record]]:
    """The records after the decision that began stage ``index`` up to its ``stage_done``
    decision (excluded), each with its typed view."""
    typed = parse_all(records)
    begun = None
    for position, rec in enumerate(typed):
        if stage_begun(rec) == index:
            begun = position
    if begun is None:
        return []
    out = []
    for raw, rec in zip(records[begun + 1:], typed[begun + 1:], strict=True):
        if isinstance(rec, Decision) and rec.what == "stage_done":
            break
        out.append((raw, rec))
    return out


def stage_records(tail: Sequence[Mapping[str, Any]], index: int) -> list[Mapping[str, Any]]:
    """The records of stage ``index`` in ``tail`` (from its ``stage`` record on)."""
    out: list[Mapping[str, Any]] = []
    for raw, rec in _stage_span(tail, index):
        if out or isinstance(rec, StageHeader):
            out.append(raw)
    return out


def stage_outcome(records: Sequence[Mapping[str, Any]], prior: Mapping[str, Any] | None
                  ) -> dict[str, Any] | None:
    """A finished stage's outcome from its own records (its final decision), or None."""
    final = None
    estimates = []
    for raw, rec in zip(records, parse_all(records), strict=True):
        if isinstance(rec, Decision) and rec.what in ("accepted", "below_acceptance",
                                                      "still_good"):
            final = raw
        elif isinstance(rec, Estimate):
            estimates.append(raw)
    if final is None:
        return None
    setpoints = {k: float(v) for k, v in final["setpoints"].items()}
    at = [r for r in estimates if holds_setpoints(r["setpoints"], setpoints)]
    last = at[-1] if at else estimates[-1]
    learned = final.get("learned")
    return {"status": final["what"],
            "accepted": final["what"] in ("accepted", "still_good"),
            "setpoints": setpoints, "estimate": dict(last["estimate"]),
            "clock_s": last.get("clock_s"),
            "lock_prior": learned if learned is not None else prior}


def stage_estimates(records: Sequence[Mapping[str, Any]], index: int, phases: int
                     ) -> list[Mapping[str, Any]]:
    """The check, verification and correction estimates of stage ``index`` with their shots."""
    out, opened = [], {}
    for raw, rec in _stage_span(records, index):
        if isinstance(rec, MeasurementOpened):
            opened[(rec.label, rec.point)] = rec.shots_per_phase
        elif isinstance(rec, Estimate) and rec.label in ("check", "verify", "correct"):
            per_phase = opened.get((rec.label, rec.point), 0)
            out.append({**raw, "shots": measurement_shots(phases, per_phase)})
    return out
