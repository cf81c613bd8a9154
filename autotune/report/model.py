"""The journal model of the report: run folders read into measurements, decisions and moves.

Reads a run folder (``manifest.json``, ``journal.jsonl``, ``result.json`` once the run ended)
into a :class:`Run`; never writes. A last journal line cut by a kill is ignored (see
:func:`autotune.run.journal.read_journal`). Journal record types and measurement labels it does not
know are counted in :attr:`Run.unknown`, so the report keeps working while the loop learns new
steps. Also the small value helpers every part of the report shares (durations, levels,
set-points for a person).
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from autotune.errors import JournalError
from autotune.run.guard import holds_setpoints
from autotune.run.journal import (JOURNAL_NAME, MANIFEST_NAME, RESULT_NAME, JournalDamage,
                              read_journal_prefix, read_json)
from autotune.progress import setpoints_text
from autotune.run.records import (Acquisition, Decision, End, Estimate, MeasurementOpened, Move,
                                  Other, SafeFailed, StageHeader, Start, parse)

FIGURE_NAME = "report.png"
"""Overview sheet: the figures of a single run, or the timeline and the latest run's figures."""
HTML_NAME = "report.html"
"""The self-contained page (figures embedded as base64 data URIs, no network)."""

SCAN_LABELS = ("refine", "lock", "relock", "bracket")
"""Measurement labels drawn as detuning scans or lock steps (figure 4)."""

SEARCH_LABELS = ("point", "search", "lock", "velocity", "relock", "bracket")
"""Measurement labels of search steps (the Gaussian-process and hand strategies' ``point``, the
phase lock's steps); checks, scans, verifications and corrections are not search steps."""

FIELD_NAMES = {"empty": "empty field", "one_photon": "one photon"}
_RUNNING = "running or killed"
_DAMAGED = "journal damaged"


@dataclass
class Measurement:
    """One measurement of a run: its set-points, counts and estimate, as journaled.

    Attributes
    ----------
    label : str
        ``point``, ``check``, ``verify``, ``refine`` or any label the loop writes.
    point : int
        Its number within the label.
    setpoints : dict
        Set-points of the measurement (SI: m/s, Hz).
    shots_per_phase : int or None
        Shots per field state and Ramsey phase, if journaled.
    stage : int
        Index of the stage record it belongs to (-1 before any).
    acquisitions : dict
        ``(field, phase_index) -> {"ramsey_phase", "e", "g", "i", "shots"}``.
    estimate : dict or None
        The journaled ``InversionEstimate.to_dict()`` once estimated.
    clock_s : float or None
        Rig clock of the estimate (s): its ``clock_s``, else the acquisitions' mid-time.
    t_wall : str or None
        Wall time of the estimate record.
    shots_after : int
        Shots acquired in the run up to and including this estimate.
    order : int
        ``seq`` of the estimate record (-1 until estimated).
    """

    label: str
    point: int
    setpoints: dict[str, float]
    shots_per_phase: int | None
    stage: int
    acquisitions: dict[tuple[str, int], dict[str, float]] = field(default_factory=dict)
    estimate: dict[str, Any] | None = None
    clock_s: float | None = None
    t_wall: str | None = None
    shots_after: int = 0
    order: int = -1
    _t_first: float | None = None
    _t_last: float | None = None

    @property
    def name(self) -> str:
        """``label #point`` (``velocity #4``: the fourth velocity step, not 4 m/s)."""
        return f"{self.label} #{self.point}"

    def value(self, key: str) -> float:
        """A float field of the estimate, NaN when absent."""
        if self.estimate is None:
            return math.nan
        try:
            return float(self.estimate.get(key, math.nan))
        except (TypeError, ValueError):
            return math.nan


@dataclass
class Run:
    """A run folder as read from disk (see :func:`load_run`)."""

    path: Path
    manifest: dict[str, Any]
    result: dict[str, Any] | None
    records: list[dict[str, Any]]
    cut_line: bool
    ended: str | None
    measurements: list[Measurement]
    stages: list[dict[str, Any]]
    decisions: list[dict[str, Any]]
    moves: list[dict[str, Any]]
    safe_failed: list[dict[str, Any]]
    shots: int
    rig_time_s: float
    clock_start: float | None
    clock_end: float | None
    unknown: Counter[str]
    damage: JournalDamage | None = None
    """The journal's first damaged line; the run holds only the records before it."""

    @property
    def name(self) -> str:
        """The folder's name."""
        return self.path.name

    @property
    def command(self) -> str:
        """The command that made the run (manifest)."""
        return str(self.manifest.get("command", "?"))

    @property
    def rig(self) -> str:
        """The rig's name from its describe reply, with '(simulated)' for a simulated rig."""
        rig = self.manifest.get("rig") or {}
        name = str(rig.get("rig", "?")) if isinstance(rig, Mapping) else "?"
        return name + (" (simulated)" if isinstance(rig, Mapping) and rig.get("simulated") else "")

    @property
    def status(self) -> str:
        """The end record's status; without one, ``journal damaged`` when the journal is read
        only up to a damaged line (its end may lie beyond), else ``running or killed``."""
        if self.ended is not None:
            return self.ended
        return _DAMAGED if self.damage is not None else _RUNNING

    @property
    def confidence(self) -> float:
        """The run's confidence level (result, an estimate, or the config; 0.95 if none)."""
        if self.result and isinstance(self.result.get("confidence"), (int, float)):
            return float(self.result["confidence"])
        for m in self.measurements:
            if m.estimate and isinstance(m.estimate.get("confidence"), (int, float)):
                return float(m.estimate["confidence"])
        try:
            return float(self.manifest["config"]["measurement"]["confidence"])
        except (KeyError, TypeError, ValueError):
            return 0.95

    @property
    def estimated(self) -> list[Measurement]:
        """Measurements with an estimate, in the order they were estimated."""
        done = [m for m in self.measurements if m.estimate is not None]
        return sorted(done, key=lambda m: m.order)

    def box(self, stage: int = -1) -> dict[str, tuple[float, float]] | None:
        """The search box of a stage record (the last one by default), or None."""
        if not self.stages:
            return None
        try:
            raw = self.stages[stage].get("box")
        except IndexError:
            return None
        if not isinstance(raw, Mapping):
            return None
        box = {}
        for name, pair in raw.items():
            try:
                low, high = float(pair[0]), float(pair[1])
            except (TypeError, ValueError, IndexError):
                continue
            if high > low:
                box[name] = (low, high)
        return box or None

    @property
    def chosen(self) -> dict[str, float] | None:
        """Set-points the run chose: the result's; before it, the last verification's (after
        the detuning scan) or else the last recommendation's."""
        if self.result and isinstance(self.result.get("setpoints"), Mapping):
            return read_setpoints(self.result["setpoints"])
        verifying = [m for m in self.measurements if m.label == "verify"]
        if verifying:
            return dict(verifying[-1].setpoints)
        for d in reversed(self.decisions):
            if d.get("what") == "recommend" and isinstance(d.get("setpoints"), Mapping):
                return read_setpoints(d["setpoints"])
        return None

    @property
    def chosen_is_verified(self) -> bool:
        """True when :attr:`chosen` comes from the result file."""
        return bool(self.result and isinstance(self.result.get("setpoints"), Mapping))

    @property
    def learned(self) -> dict[str, Any] | None:
        """What the phase lock had learned when it stopped searching (the last ``stop_search``
        decision's ``learned``: its phase curve ``lock_fit``, ``absorption_fit``, the phase at the
        peak, ...), or None (another strategy, or not stopped yet)."""
        for d in reversed(self.decisions):
            if d.get("what") == "stop_search" and isinstance(d.get("learned"), Mapping):
                return dict(d["learned"])
        return None

    @property
    def recommended(self) -> dict[str, Any] | None:
        """The last ``recommend`` decision (set-points and predicted inversion), or None."""
        for d in reversed(self.decisions):
            if d.get("what") == "recommend" and isinstance(d.get("setpoints"), Mapping):
                return d
        return None

    @property
    def truth(self) -> dict[str, Any] | None:
        """The dry run's truth block of the result, if any."""
        truth = (self.result or {}).get("truth")
        return truth if isinstance(truth, Mapping) else None

    def final_measurement(self) -> Measurement | None:
        """The measurement behind the reported inversion.

        With a result: the latest measurement at the chosen set-points, preferring ``verify``,
        then ``check`` (a still-good retune), then any label. Without: the latest ``verify``,
        else None.
        """
        done = self.estimated
        chosen = self.chosen if self.chosen_is_verified else None
        if chosen is not None:
            at = [m for m in done if setpoints_equal(m.setpoints, chosen)]
            for label in ("verify", "check"):
                picked = [m for m in at if m.label == label]
                if picked:
                    return picked[-1]
            if at:
                return at[-1]
        verified = [m for m in done if m.label == "verify"]
        return verified[-1] if verified else None


def read_setpoints(raw: Mapping[str, Any]) -> dict[str, float]:
    """The set-points of a journaled mapping that are numbers (a bool or text left out).

    Parameters
    ----------
    raw : Mapping
        Set-points as journaled (name -> value in SI units: m/s, Hz).

    Returns
    -------
    dict of str to float
    """
    out = {}
    for name, value in raw.items():
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            out[str(name)] = float(value)
    return out


def setpoints_equal(a: Mapping[str, float], b: Mapping[str, float]) -> bool:
    """Whether two sets of set-points are the same: the same names, each value equal to
    float rounding (:func:`autotune.run.guard.setpoint_in_force`).

    Parameters
    ----------
    a, b : Mapping of str to float
        Set-points (SI units: m/s, Hz).
    """
    return set(a) == set(b) and holds_setpoints(a, b)


def _is_run_folder(path: Path) -> bool:
    return (path / MANIFEST_NAME).exists() or (path / JOURNAL_NAME).exists()


def find_runs(path: Path) -> list[Path]:
    """The run folders a report of ``path`` covers.

    ``path`` itself if it is a run folder (it holds ``manifest.json`` or ``journal.jsonl``);
    otherwise its direct sub-folders that are run folders, oldest first (manifest ``started``,
    then name).

    Raises
    ------
    JournalError
        ``path`` does not exist, or is neither a run folder nor holds any.
    """
    path = Path(path)
    if not path.is_dir():
        raise JournalError(f"{path}: no such folder")
    if _is_run_folder(path):
        return [path]
    subs = sorted(p for p in path.iterdir() if p.is_dir() and _is_run_folder(p))
    if not subs:
        raise JournalError(f"{path}: not a run folder ({MANIFEST_NAME}: no such file) and "
                           "holds no run folders")

    def started(p: Path) -> tuple[str, str]:
        try:
            return str(read_json(p / MANIFEST_NAME).get("started", "")), p.name
        except (JournalError, AttributeError):
            return "", p.name

    return sorted(subs, key=started)


def load_run(path: Path) -> Run:
    """Read a run folder: manifest, every complete journal record, the result if written.

    Raises
    ------
    JournalError
        A missing or damaged manifest or journal, a damaged result file, or a record of a
        known type without the fields it must have (the message names the path and ``seq``).
    """
    path = Path(path)
    manifest = read_json(path / MANIFEST_NAME)
    if not isinstance(manifest, dict):
        raise JournalError(f"{path / MANIFEST_NAME}: expected a JSON object, "
                           f"got {type(manifest).__name__}")
    journal = path / JOURNAL_NAME
    # A damaged journal is shown up to its first damaged line (the notices say where and what).
    records, damage = read_journal_prefix(journal)
    size = journal.stat().st_size
    cut_line = size > 0 and _last_byte(journal) != b"\n"
    result = None
    if (path / RESULT_NAME).exists():
        result = read_json(path / RESULT_NAME)
        if not isinstance(result, dict):
            raise JournalError(f"{path / RESULT_NAME}: expected a JSON object, "
                               f"got {type(result).__name__}")
    run = _walk(path, manifest, result, records, cut_line)
    run.damage = damage
    return run


def _last_byte(path: Path) -> bytes:
    with path.open("rb") as handle:
        handle.seek(-1, 2)
        return handle.read(1)


def _walk(path: Path, manifest: dict[str, Any], result: dict[str, Any] | None,
          records: list[dict[str, Any]], cut_line: bool) -> Run:
    """Fold the journal's records into measurements, decisions and moves."""
    measurements: list[Measurement] = []
    latest: dict[tuple[str, int], Measurement] = {}
    stages: list[dict[str, Any]] = []
    decisions: list[dict[str, Any]] = []
    moves: list[dict[str, Any]] = []
    safe_failed: list[dict[str, Any]] = []
    unknown: Counter[str] = Counter()
    ended: str | None = None
    clock: float | None = None
    clock_start: float | None = None
    shots = 0
    rig_time = 0.0

    def measurement_of(label: str, point: int, setpoints: Mapping[str, float]) -> Measurement:
        key = (label, point)
        if key not in latest:
            # An acquisition or estimate without its measurement record: keep it anyway.
            m = Measurement(label, point, read_setpoints(setpoints), None, len(stages) - 1)
            measurements.append(m)
            latest[key] = m
        return latest[key]

    for raw in records:
        rec = parse(raw)  # a record that does not fit its type: JournalError naming its seq
        if isinstance(rec, Start):
            if rec.clock is not None:
                clock = rec.clock
        elif isinstance(rec, StageHeader):
            stages.append(raw)
        elif isinstance(rec, MeasurementOpened):
            m = Measurement(rec.label, rec.point, read_setpoints(rec.setpoints), rec.shots_per_phase,
                            len(stages) - 1)
            measurements.append(m)
            latest[(m.label, m.point)] = m
        elif isinstance(rec, Acquisition):
            m = measurement_of(rec.label, rec.point, rec.setpoints)
            m.acquisitions[(rec.field, rec.phase_index)] = {
                "ramsey_phase": rec.ramsey_phase, "e": rec.counts.e, "g": rec.counts.g,
                "i": rec.counts.i, "shots": rec.shots}
            m._t_first = rec.t_start if m._t_first is None else min(m._t_first, rec.t_start)
            m._t_last = rec.t_end if m._t_last is None else max(m._t_last, rec.t_end)
            shots += rec.shots
            rig_time += rec.t_end - rec.t_start
            clock = rec.t_end
        elif isinstance(rec, Estimate):
            m = measurement_of(rec.label, rec.point, rec.setpoints)
            m.estimate = dict(rec.estimate)
            if rec.clock_s is not None:
                m.clock_s = rec.clock_s
            elif m._t_first is not None and m._t_last is not None:
                m.clock_s = 0.5 * (m._t_first + m._t_last)
            else:
                m.clock_s = clock
            m.t_wall = rec.t_wall
            m.shots_after = shots
            m.order = rec.seq
        elif isinstance(rec, Move):
            if rec.clock is not None:
                clock = rec.clock
            moves.append({"clock": clock, "t_wall": rec.t_wall,
                          "setpoints": read_setpoints(rec.applied or rec.setpoints),
                          "reason": rec.reason})
        elif isinstance(rec, Decision):
            decisions.append({**raw, "what": rec.what, "reason": rec.reason, "clock": clock})
        elif isinstance(rec, SafeFailed):
            safe_failed.append(raw)
        elif isinstance(rec, End):
            ended = rec.status
        elif isinstance(rec, Other):
            unknown[rec.type] += 1
            if isinstance(rec.get("clock"), (int, float)):
                clock = float(rec.get("clock"))
        # The others are drawn through what they lead to: the proposal's move, a request's
        # acquisition or move, a night's check (its estimate and decisions); a move the rig did
        # not confirm left the set-points where the next move or acquisition shows them.
        if clock_start is None and clock is not None:
            clock_start = clock
    return Run(path=path, manifest=manifest, result=result, records=records, cut_line=cut_line,
               ended=ended, measurements=measurements, stages=stages, decisions=decisions,
               moves=moves, safe_failed=safe_failed, shots=shots, rig_time_s=rig_time,
               clock_start=clock_start, clock_end=clock, unknown=unknown)


def parse_time(text: Any) -> datetime | None:
    """A journaled wall time (ISO 8601) as an aware datetime, UTC when it names no zone.

    Parameters
    ----------
    text : Any
        A record's ``t_wall`` (or a manifest's ``started``).

    Returns
    -------
    datetime or None
        None for anything that is not an ISO 8601 string.
    """
    if not isinstance(text, str):
        return None
    try:
        value = datetime.fromisoformat(text)
    except ValueError:
        return None
    return value if value.tzinfo is not None else value.replace(tzinfo=UTC)



def measured_duration_text(seconds: float | None) -> str:
    """A measured duration in a report (rig time, wall time, a journal's age) to its first
    decimal: ``"42.0 s"`` below 2 min, ``"7.6 min"`` below 2 h, then ``"2.25 h"``.

    Live displays round instead (:func:`autotune.progress.rough_duration_text`).

    Parameters
    ----------
    seconds : float or None
        The duration (s); None or not finite reads ``"unknown"``.
    """
    if seconds is None or not math.isfinite(seconds):
        return "unknown"
    if seconds < 120:
        return f"{seconds:.1f} s"
    if seconds < 7200:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.2f} h"


def level_label(confidence: float) -> str:
    """A confidence level as a person reads it: ``0.95`` -> ``"95 %"``.

    Parameters
    ----------
    confidence : float
        The level as a fraction.
    """
    return f"{100 * confidence:g} %"


def number_at(data: Any, *keys: str, default: float = math.nan) -> float:
    """The number at ``keys`` in journaled data (nested mappings), or ``default``.

    The one reader of a number out of a record, a result or a manifest: whatever is missing,
    null, a bool, text or not a mapping along the way gives ``default``, so a report draws
    what it can of a damaged or older journal.

    Parameters
    ----------
    data : Any
        A mapping (a record, ``result.json``, the manifest), or a bare value when ``keys`` is
        empty.
    *keys : str
        The path of keys down to the number (``"numbers", "lock", "peak_hz"``).
    default : float
        What to return when there is no number there (NaN unless given).

    Returns
    -------
    float
        The number as a float, or ``default`` as given.
    """
    value = data
    for key in keys:
        if not isinstance(value, Mapping):
            return default
        value = value.get(key)
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return float(value)
    return default



def format_setpoints(setpoints: Mapping[str, float] | None) -> str:
    """Set-points as a person reads them (:func:`autotune.progress.setpoints_text`), or
    ``"none"``.

    Parameters
    ----------
    setpoints : Mapping of str to float, or None
        Set-points in SI units (m/s, Hz).
    """
    return setpoints_text(setpoints) if setpoints else "none"


