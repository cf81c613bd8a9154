"""The morning report: figures, an HTML page and a text summary of runs (reads only).

The report never touches a rig and never changes a run's own files; it only adds its figures
and its page next to them (or under ``--out DIR``). It reads

- a **run folder** (``manifest.json``, ``journal.jsonl``, ``result.json`` once the run ended):
  finished, stopped, or still running / killed (no ``result.json``; a last journal line cut by
  a kill is ignored, see :func:`autotune.journal.read_journal`);
- a **folder of run folders**: a dry run's output (``calibrate/``, ``retune/``, plus
  ``last-good.json`` and ``rig.log``) or a night of ``track`` (``cycle-0000/``, ...). Every run
  gets a section, and the folder a timeline of all of them against rig time.

A single run folder of the command ``track`` (one journal for the whole night) also gets the
timeline. Journal record types and measurement labels this module does not know are ignored
(counted in the page's notes), so it keeps working while the loop learns new steps.

Figures (PNG, matplotlib's Agg canvas, no display needed), each returned as a
:class:`matplotlib.figure.Figure` by its drawing function before it is saved:

1. ``fringes``: both Ramsey fringes P_g(phi) at the chosen set-points, the data with binomial
   (Wilson) error bars at the run's confidence, and ``a + b cos phi + c sin phi`` refitted from
   the journal's counts with :func:`autotune.fringe.fit_fringe`;
2. ``progress``: the best inversion measured so far, with its interval, against cumulative shots;
3. ``map``: the measured points over the (velocity, detuning) box, numbered in order, over a
   Gaussian-process regression of the measured inversions (display only), the chosen point and,
   in a dry run, the simulator's true best;
4. ``scan``: inversion against detuning for the detuning scans (labels ``refine``, ``lock``,
   ``relock``, ``bracket``);
5. ``phase-shift``: the photon phase shift (units of pi) against detuning, with error bars;
6. ``night`` / ``timeline``: inversion, detuning set-point and corrections against rig time.

Flags (:func:`run_flags`) list what a person should look at first: search points piled at an
edge of the box, a recommendation at an edge, a phase shift far from pi at the chosen point, a
poor fringe fit, a run that did not end (or ended badly), a failed return to safe set-points.
"""

from __future__ import annotations

import base64
import html
import io
import math
import re
import warnings
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from scipy import stats

from autotune.errors import EstimationError, JournalError
from autotune.fringe import FringeData, fit_fringe
from autotune.journal import JOURNAL_NAME, MANIFEST_NAME, RESULT_NAME, read_journal, read_json
from autotune.progress import count_text, setpoint_value_text, setpoints_text

__all__ = [
    "FIGURE_NAME",
    "HTML_NAME",
    "SCAN_LABELS",
    "SEARCH_LABELS",
    "Measurement",
    "Run",
    "Flag",
    "ReportFigure",
    "Report",
    "find_runs",
    "load_run",
    "run_flags",
    "figure_fringes",
    "figure_progress",
    "figure_map",
    "figure_scan",
    "figure_phase_shift",
    "figure_timeline",
    "build_report",
    "format_text",
    "render_html",
    "write_report",
]

FIGURE_NAME = "report.png"
"""Overview sheet: the figures of a single run, or the timeline and the latest run's figures."""
HTML_NAME = "report.html"
"""The self-contained page (figures embedded as base64 data URIs, no network)."""

SCAN_LABELS = ("refine", "lock", "relock", "bracket")
"""Measurement labels drawn as detuning scans or lock steps (figure 4)."""

SEARCH_LABELS = ("point", "search", "lock", "velocity", "relock", "bracket")
"""Measurement labels of search steps (the Gaussian-process and hand strategies' ``point``, the
phase lock's steps); checks, scans, verifications and corrections are not search steps."""

#: An edge zone is this fraction of the box width, on each side of each axis.
EDGE_FRACTION = 0.02
#: Points are "piled" at an edge when more than this fraction of the search points sit in its zone.
PILE_FRACTION = 1.0 / 3.0
#: Phase shift flagged when farther from pi than this many standard errors ...
PHASE_SIGMAS = 3.0
#: ... and than this many rad.
PHASE_MIN_RAD = 0.1 * math.pi
#: Fringe fit flagged when its chi-square p-value is below this.
FIT_P_VALUE = 1e-3
#: Decisions (``what``) that are flagged with their reason wherever they occur.
ALARM_DECISIONS = frozenset({"alarm", "rig_mismatch"})
#: Ended statuses that mean the run stopped before its result.
BAD_ENDINGS = frozenset({"interrupted", "aborted", "failed"})

_FIELDS = ("empty", "one_photon")
_FIELD_NAMES = {"empty": "empty field", "one_photon": "one photon"}
_LABEL_MARKERS = {"point": "o", "check": "s", "verify": "D", "refine": "^", "lock": "v",
                  "relock": "<", "bracket": ">", "velocity": "P", "search": "o", "correct": "X"}
_RUNNING = "running or killed"
# Above this many measurements a text summary gives one line per label instead of a table.
_TEXT_TABLE_MAX = 80
# Above this many runs in a folder, the text gives one line per run instead of a section each.
_TEXT_SECTIONS_MAX = 3
# Above this many runs, the timeline marks where each starts but no longer names it.
_NAMED_RUNS_MAX = 12
_DPI = 100


# --------------------------------------------------------------------------------------------
# Reading runs
# --------------------------------------------------------------------------------------------


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
        """The end record's status, or ``running or killed`` without an end record."""
        if self.ended is not None:
            return self.ended
        return _RUNNING

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
            return _setpoints(self.result["setpoints"])
        verifying = [m for m in self.measurements if m.label == "verify"]
        if verifying:
            return dict(verifying[-1].setpoints)
        for d in reversed(self.decisions):
            if d.get("what") == "recommend" and isinstance(d.get("setpoints"), Mapping):
                return _setpoints(d["setpoints"])
        return None

    @property
    def chosen_is_verified(self) -> bool:
        """True when :attr:`chosen` comes from the result file."""
        return bool(self.result and isinstance(self.result.get("setpoints"), Mapping))

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
            at = [m for m in done if _same_setpoints(m.setpoints, chosen)]
            for label in ("verify", "check"):
                picked = [m for m in at if m.label == label]
                if picked:
                    return picked[-1]
            if at:
                return at[-1]
        verified = [m for m in done if m.label == "verify"]
        return verified[-1] if verified else None


def _setpoints(raw: Mapping[str, Any]) -> dict[str, float]:
    out = {}
    for name, value in raw.items():
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            out[str(name)] = float(value)
    return out


def _same_setpoints(a: Mapping[str, float], b: Mapping[str, float]) -> bool:
    if set(a) != set(b):
        return False
    return all(abs(a[k] - b[k]) <= 1e-9 * max(1.0, abs(b[k])) for k in a)


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
    records = read_journal(journal)
    size = journal.stat().st_size
    cut_line = size > 0 and _last_byte(journal) != b"\n"
    result = None
    if (path / RESULT_NAME).exists():
        result = read_json(path / RESULT_NAME)
        if not isinstance(result, dict):
            raise JournalError(f"{path / RESULT_NAME}: expected a JSON object, "
                               f"got {type(result).__name__}")
    return _walk(path, manifest, result, records, cut_line)


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

    def measurement_of(rec: Mapping[str, Any]) -> Measurement:
        key = (str(rec["label"]), int(rec["point"]))
        if key not in latest:
            # An acquisition or estimate without its measurement record: keep it anyway.
            m = Measurement(key[0], key[1], _setpoints(rec.get("setpoints") or {}), None,
                            len(stages) - 1)
            measurements.append(m)
            latest[key] = m
        return latest[key]

    for rec in records:
        kind = rec.get("type")
        try:
            if kind == "start":
                if isinstance(rec.get("clock"), (int, float)):
                    clock = float(rec["clock"])
            elif kind == "stage":
                stages.append(rec)
            elif kind == "measurement":
                m = Measurement(str(rec["label"]), int(rec["point"]),
                                _setpoints(rec["setpoints"]),
                                int(rec["shots_per_phase"]) if "shots_per_phase" in rec else None,
                                len(stages) - 1)
                measurements.append(m)
                latest[(m.label, m.point)] = m
            elif kind == "acquisition":
                m = measurement_of(rec)
                counts = rec["counts"]
                t_start, t_end = float(rec["t_start"]), float(rec["t_end"])
                m.acquisitions[(str(rec["field"]), int(rec["phase_index"]))] = {
                    "ramsey_phase": float(rec["ramsey_phase"]), "e": int(counts["e"]),
                    "g": int(counts["g"]), "i": int(counts["i"]), "shots": int(rec["shots"])}
                m._t_first = t_start if m._t_first is None else min(m._t_first, t_start)
                m._t_last = t_end if m._t_last is None else max(m._t_last, t_end)
                shots += int(rec["shots"])
                rig_time += t_end - t_start
                clock = t_end
            elif kind == "estimate":
                m = measurement_of(rec)
                if not isinstance(rec["estimate"], Mapping):
                    raise TypeError("estimate is not an object")
                m.estimate = dict(rec["estimate"])
                if isinstance(rec.get("clock_s"), (int, float)):
                    m.clock_s = float(rec["clock_s"])
                elif m._t_first is not None and m._t_last is not None:
                    m.clock_s = 0.5 * (m._t_first + m._t_last)
                else:
                    m.clock_s = clock
                m.t_wall = rec.get("t_wall")
                m.shots_after = shots
                m.order = int(rec.get("seq", -1))
            elif kind == "move":
                applied = rec.get("applied") or rec.get("setpoints")
                if isinstance(rec.get("clock"), (int, float)):
                    clock = float(rec["clock"])
                moves.append({"clock": clock, "t_wall": rec.get("t_wall"),
                              "setpoints": _setpoints(applied or {}),
                              "reason": str(rec.get("reason", ""))})
            elif kind == "decision":
                decisions.append({**rec, "what": str(rec["what"]),
                                  "reason": str(rec.get("reason", "")), "clock": clock})
            elif kind == "safe_failed":
                safe_failed.append(rec)
            elif kind == "end":
                ended = str(rec["status"])
            elif kind in ("proposal", "safe", "request", "wait", "hold", "move_unconfirmed"):
                # Drawn through what they lead to: the proposal's move, a request's
                # acquisition or move, a night's wait and check (its estimate and decisions);
                # a move the rig did not confirm left the set-points where the next move or
                # acquisition shows them.
                if kind == "wait" and isinstance(rec.get("clock"), (int, float)):
                    clock = float(rec["clock"])
            else:
                unknown[str(kind)] += 1
                if isinstance(rec.get("clock"), (int, float)):
                    clock = float(rec["clock"])
        except (KeyError, TypeError, ValueError) as exc:
            raise JournalError(f"{path / JOURNAL_NAME}: record seq {rec.get('seq')} ({kind}) "
                               f"is damaged: {exc!r}") from exc
        if clock_start is None and clock is not None:
            clock_start = clock
    return Run(path=path, manifest=manifest, result=result, records=records, cut_line=cut_line,
               ended=ended, measurements=measurements, stages=stages, decisions=decisions,
               moves=moves, safe_failed=safe_failed, shots=shots, rig_time_s=rig_time,
               clock_start=clock_start, clock_end=clock, unknown=unknown)


# --------------------------------------------------------------------------------------------
# Flags
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Flag:
    """Something a person should look at, with the reason in words.

    ``kind`` is one of ``did_not_end``, ``ended_badly``, ``below_acceptance``, ``safe_failed``,
    ``edge_pile``, ``edge_choice``, ``phase_shift``, ``poor_fit``, ``alarm``.
    """

    kind: str
    text: str


def _edge_zone(low: float, high: float) -> float:
    return EDGE_FRACTION * (high - low)


def _fmt_setpoints(setpoints: Mapping[str, float] | None) -> str:
    return setpoints_text(setpoints) if setpoints else "none"


def fit_p_value(chi2: float, dof: int) -> float:
    """Upper-tail probability of a chi-square ``chi2`` with ``dof`` degrees (NaN if dof < 1)."""
    if not (dof >= 1 and math.isfinite(chi2)):
        return math.nan
    return float(stats.chi2.sf(chi2, dof))


def _poor_fits(m: Measurement) -> list[tuple[str, float, int, float]]:
    out = []
    for fld in _FIELDS:
        chi2 = m.value(f"chi2_{fld}")
        dof_raw = m.value(f"dof_{fld}")
        dof = int(dof_raw) if math.isfinite(dof_raw) else 0
        p = fit_p_value(chi2, dof)
        if p < FIT_P_VALUE:
            out.append((fld, chi2, dof, p))
    return out


def run_flags(run: Run) -> list[Flag]:
    """What to look at in one run, most urgent first.

    Parameters
    ----------
    run : Run

    Returns
    -------
    list of Flag
        ``did_not_end``: no end record (still running, or killed); ``ended_badly``: ended
        interrupted, aborted or failed; ``below_acceptance``; ``safe_failed``: the return to
        safe set-points failed; ``alarm``: an alarm-like decision; ``edge_pile``: more than a
        third of a stage's search points within 2 % of the box width of one edge;
        ``edge_choice``: the chosen set-points within 2 % of an edge; ``phase_shift``: the
        chosen point's phase shift more than 3 standard errors and more than 0.1 pi from pi;
        ``poor_fit``: a fringe fit whose chi-square p-value is below 0.001.
    """
    flags: list[Flag] = []
    if run.ended is None:
        last = run.records[-1].get("t_wall") if run.records else None
        age = _age(last)
        text = (f"the run did not end: no end record (still running, or killed)"
                f"{'; the journal ends mid-line, a write cut by a kill' if run.cut_line else ''}"
                f"; last record {last or 'none'}{age}. A killed run continues with "
                f"'autotune {run.command} --config F --resume {run.path}'.")
        flags.append(Flag("did_not_end", text))
    elif run.ended in BAD_ENDINGS:
        reasons = [d["reason"] for d in run.decisions if d["what"] in ("abort", "give_up")]
        why = f": {reasons[-1]}" if reasons else ""
        flags.append(Flag("ended_badly", f"the run ended {run.ended}{why}; it can continue with "
                          f"'autotune {run.command} --config F --resume {run.path}'"))
    elif run.ended == "below_acceptance":
        flags.append(Flag("below_acceptance", "the verified inversion is below the acceptance "
                          "threshold; the rig was left at the chosen set-points"))
    for rec in run.safe_failed:
        flags.append(Flag("safe_failed", f"the return to safe set-points FAILED "
                          f"({rec.get('reason', '')}: {rec.get('error', '')}); check the rig"))
    for d in run.decisions:
        if d["what"] in ALARM_DECISIONS:
            flags.append(Flag("alarm", f"{d['what']}: {d['reason']}"))

    for index in range(len(run.stages)):
        box = run.box(index)
        points = [m for m in run.measurements if m.label in SEARCH_LABELS and m.stage == index]
        if box is None or not points:
            continue
        for name, (low, high) in box.items():
            zone = _edge_zone(low, high)
            for side, edge in (("lower", low), ("upper", high)):
                near = [m for m in points if name in m.setpoints
                        and abs(m.setpoints[name] - edge) <= zone]
                if len(near) > PILE_FRACTION * len(points):
                    flags.append(Flag("edge_pile", f"{len(near)} of {len(points)} search points "
                                      f"lie within 2 % of the {side} {name} edge "
                                      f"({setpoint_value_text(name, edge)}): the best may be outside the "
                                      "box"))
    chosen = run.chosen
    box = run.box()
    if chosen is not None and box is not None:
        for name, (low, high) in box.items():
            if name not in chosen:
                continue
            zone = _edge_zone(low, high)
            for side, edge in (("lower", low), ("upper", high)):
                if abs(chosen[name] - edge) <= zone:
                    flags.append(Flag("edge_choice", f"the chosen {name} "
                                      f"{setpoint_value_text(name, chosen[name])} is at the {side} edge "
                                      f"of the box ({setpoint_value_text(name, edge)})"))
    final = run.final_measurement()
    if final is not None:
        shift, stderr = final.value("phase_shift"), final.value("phase_shift_stderr")
        off = abs(shift - math.pi)
        if math.isfinite(off) and off > PHASE_SIGMAS * stderr and off > PHASE_MIN_RAD:
            sigmas = f"{off / stderr:.1f}" if stderr > 0 else "infinitely many"
            flags.append(Flag("phase_shift", f"the phase shift at the chosen point ({final.name})"
                              f" is {shift / math.pi:.3f} pi +- {stderr / math.pi:.3f} pi, "
                              f"{off / math.pi:.2f} pi from pi ({sigmas} standard errors): the "
                              "setting is off the 2 pi condition"))
    poor = [(m, fits) for m in run.estimated if (fits := _poor_fits(m))]
    for m, fits in poor[:3]:
        for fld, chi2, dof, p in fits:
            flags.append(Flag("poor_fit", f"poor fringe fit of {m.name} ({_FIELD_NAMES[fld]}): "
                              f"reduced chi2 {chi2 / dof:.2f} ({chi2:.1f} for {dof} dof), "
                              f"p = {p:.1e}"))
    if len(poor) > 3:
        flags.append(Flag("poor_fit", f"{len(poor) - 3} more measurements with a poor fringe "
                          f"fit (p < {FIT_P_VALUE:g}); see the measurement table"))
    return flags


def _parse_time(text: Any) -> datetime | None:
    if not isinstance(text, str):
        return None
    try:
        value = datetime.fromisoformat(text)
    except ValueError:
        return None
    return value if value.tzinfo is not None else value.replace(tzinfo=UTC)


def _age(t_wall: Any) -> str:
    when = _parse_time(t_wall)
    if when is None:
        return ""
    seconds = (datetime.now(UTC) - when).total_seconds()
    return f" ({_duration(seconds)} ago)" if seconds >= 0 else ""


# --------------------------------------------------------------------------------------------
# Header
# --------------------------------------------------------------------------------------------


def _duration(seconds: float | None) -> str:
    if seconds is None or not math.isfinite(seconds):
        return "unknown"
    if seconds < 120:
        return f"{seconds:.1f} s"
    if seconds < 7200:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.2f} h"


def _level(confidence: float) -> str:
    return f"{100 * confidence:g} %"


def _number(mapping: Mapping[str, Any], key: str, default: float) -> float:
    value = mapping.get(key, default)
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return float(value)
    return default


def _interval(result: Mapping[str, Any]) -> tuple[float, float, float] | None:
    """The result's inversion and interval, or None if absent or not numbers."""
    pair = result.get("inversion_interval")
    inv = _number(result, "inversion", math.nan)
    if not (isinstance(pair, Sequence) and len(pair) == 2 and math.isfinite(inv)):
        return None
    low, high = (_number({"v": v}, "v", math.nan) for v in pair)
    return (inv, low, high) if math.isfinite(low) and math.isfinite(high) else None


def _night_header(run: Run) -> list[tuple[str, str]]:
    """A night's header (``autotune track``): its end, the set-points held, its counts and beam
    share, and its last check (a check, not a verification)."""
    result = run.result or {}
    rows = [("rig", run.rig), ("command", run.command),
            ("started", str(run.manifest.get("started", "?"))), ("status", run.status)]
    rows.append(("stop reason", str(result.get("stop_reason") or "none yet")))
    if result:
        held = result.get("held", True)
        rows.append(("held set-points", _fmt_setpoints(_setpoints(result["setpoints"]))
                     if held else "none (no stage was accepted)"))
        counts = ", ".join(count_text(int(result.get(k, 0)), k[:-1]) for k in (
            "checks", "rechecks", "corrections", "alarms", "retunes", "calibrations",
            "failures"))
        rows.append(("night", f"{_duration(_number(result, 'night_rig_time_s', math.nan))} of "
                     f"rig time: {counts}"))
        share = result.get("holding_share")
        rows.append(("beam on holding", ("-" if share is None else f"{share:.1%}")
                     + f" of the night's rig time (budget "
                     f"{_number(result, 'budget_fraction', math.nan):.0%})"))
    checks = [m for m in run.estimated if m.label == "hold"]
    if checks:
        last = checks[-1]
        rows.append(("last check", f"{last.value('inversion'):.3f} "
                     f"[{last.value('inversion_low'):.3f}, {last.value('inversion_high'):.3f}]"
                     f" ({_level(run.confidence)} interval; check {last.point} at "
                     f"{_fmt_setpoints(last.setpoints)}, phase shift "
                     f"{last.value('phase_shift') / math.pi:.3f} pi)"))
        low = min(checks, key=lambda m: m.value("inversion"))
        rows.append(("lowest check", f"{low.value('inversion'):.3f} "
                     f"[{low.value('inversion_low'):.3f}, {low.value('inversion_high'):.3f}] "
                     f"(check {low.point})"))
    else:
        rows.append(("last check", "none yet"))
    rows.append(("effort", f"{len(run.estimated)} measurements, "
                 f"{int(_number(result, 'shots', run.shots)):,} shots, beam time "
                 f"{_duration(_number(result, 'rig_time_s', run.rig_time_s))}"))
    return rows


def _header(run: Run) -> list[tuple[str, str]]:
    """The run's header as (name, text) rows, for the text summary and the page."""
    if run.command == "track":
        return _night_header(run)
    result = run.result or {}
    rows = [("rig", run.rig), ("command", run.command),
            ("started", str(run.manifest.get("started", "?"))), ("status", run.status)]
    final = run.final_measurement()
    level = _level(run.confidence)
    verified = _interval(result)
    if verified is not None:
        inv, low, high = verified
        rows.append(("verified inversion", f"{inv:.3f} [{low:.3f}, {high:.3f}] "
                     f"({level} interval)"))
    elif final is not None:
        rows.append(("verified inversion", f"{final.value('inversion'):.3f} "
                     f"[{final.value('inversion_low'):.3f}, {final.value('inversion_high'):.3f}]"
                     f" ({level} interval; from the journal, no result file)"))
    else:
        rows.append(("verified inversion", "none yet"))
    best = _best(run.estimated)
    if best is not None and (final is None or best is not final):
        rows.append(("best measured", f"{best.value('inversion'):.3f} "
                     f"[{best.value('inversion_low'):.3f}, {best.value('inversion_high'):.3f}] "
                     f"at {best.name} ({_fmt_setpoints(best.setpoints)})"))
    chosen = run.chosen
    rows.append(("chosen set-points", _fmt_setpoints(chosen) +
                 ("" if chosen is None or run.chosen_is_verified
                  else " (not yet verified)")))
    if final is not None:
        shift, stderr = final.value("phase_shift"), final.value("phase_shift_stderr")
        rows.append(("phase shift", f"{shift / math.pi:.3f} pi +- {stderr / math.pi:.3f} pi; "
                     f"absorption {final.value('absorption'):.3f}; contrasts "
                     f"{final.value('contrast_empty'):.3f} (empty), "
                     f"{final.value('contrast_one_photon'):.3f} (one photon)"))
    points = int(_number(result, "points", sum(m.label in SEARCH_LABELS for m in run.estimated)))
    shots = int(_number(result, "shots", run.shots))
    rig_time = _number(result, "rig_time_s", run.rig_time_s)
    if math.isfinite(_number(result, "wall_time_s", math.nan)):
        wall = _duration(_number(result, "wall_time_s", math.nan))
    else:
        first = _parse_time(run.records[0].get("t_wall")) if run.records else None
        last = _parse_time(run.records[-1].get("t_wall")) if run.records else None
        wall = (_duration((last - first).total_seconds()) + " so far"
                if first is not None and last is not None else "unknown")
    rows.append(("effort", f"{points} search points, {len(run.estimated)} measurements, "
                 f"{shots:,} shots, rig time {_duration(rig_time)}, wall time {wall}"))
    stop = result.get("stop_reason")
    if not stop:
        stops = [d["reason"] for d in run.decisions if d["what"] == "stop_search"]
        stop = stops[-1] if stops else "none yet"
    rows.append(("stop reason", str(stop)))
    truth = run.truth
    if truth is not None:
        try:
            at, best_true = float(truth["inversion_at_chosen"]), float(truth["best_inversion"])
            rows.append(("truth (simulated)", f"true@chosen {at:.3f}, true best {best_true:.3f} "
                         f"at {_fmt_setpoints(_setpoints(truth['best_setpoints']))}; "
                         f"ratio {at / best_true:.3f}"))
        except (KeyError, TypeError, ValueError, ZeroDivisionError):
            rows.append(("truth (simulated)", "unreadable truth block"))
    return rows


def _best(done: Sequence[Measurement]) -> Measurement | None:
    finite = [m for m in done if math.isfinite(m.value("inversion"))]
    return max(finite, key=lambda m: m.value("inversion")) if finite else None


# --------------------------------------------------------------------------------------------
# Figures
# --------------------------------------------------------------------------------------------


def _new_figure(width: float = 7.0, height: float = 4.5) -> Any:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=_DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _marker(label: str) -> str:
    return _LABEL_MARKERS.get(label, "X")


def _errorbar(ax: Any, x: Any, y: Any, *, gid: str, **kwargs: Any) -> Any:
    """``ax.errorbar`` with ``gid`` on the data line only (matplotlib would copy it to the bars)."""
    container = ax.errorbar(x, y, **kwargs)
    container.lines[0].set_gid(gid)
    return container


def _title(fig: Any, run: Run | None, text: str) -> None:
    fig.suptitle(f"{run.name}: {text}" if run is not None else text, fontsize=11)


def figure_fringes(run: Run) -> tuple[Any, str] | None:
    """Figure 1: both fringes at the chosen set-points, data and refitted curves.

    The data are P_g = g / (e + g + i) at each Ramsey phase with Wilson intervals at the run's
    confidence (``scipy.stats.binomtest(...).proportion_ci``); the curves are
    ``a + b cos phi + c sin phi`` from :func:`autotune.fringe.fit_fringe` on the journal's
    counts. Without chosen set-points yet (a running run) it shows the latest measurement.
    Returns ``(figure, caption)``, or None before the first estimate.
    """
    m = run.final_measurement()
    which = "the chosen set-points"
    if m is None and run.estimated:
        m = run.estimated[-1]
        which = "the latest measurement (no set-points chosen yet)"
    if m is None or not m.acquisitions:
        return None
    fig = _new_figure()
    ax = fig.add_subplot()
    level = run.confidence
    fit_notes = []
    dense = np.linspace(0.0, 2.0 * math.pi, 241)
    for fld, colour in zip(_FIELDS, ("tab:blue", "tab:red"), strict=True):
        rows = sorted((j, a) for (f, j), a in m.acquisitions.items() if f == fld)
        if not rows:
            continue
        phase = np.array([a["ramsey_phase"] for _, a in rows])
        e = np.array([a["e"] for _, a in rows], dtype=np.int64)
        g = np.array([a["g"] for _, a in rows], dtype=np.int64)
        i = np.array([a["i"] for _, a in rows], dtype=np.int64)
        n = e + g + i
        keep = n > 0
        p = g[keep] / n[keep]
        cis = [stats.binomtest(int(k), int(t)).proportion_ci(confidence_level=level,
                                                               method="wilson")
               for k, t in zip(g[keep], n[keep], strict=True)]
        low = np.array([c.low for c in cis])
        high = np.array([c.high for c in cis])
        x = np.mod(phase[keep], 2.0 * math.pi)
        _errorbar(ax, x, p, yerr=[p - low, high - p], fmt="o", color=colour, capsize=3, ms=5,
                    label=f"{_FIELD_NAMES[fld]}: data ({_level(level)} Wilson)", gid=f"data-{fld}")
        try:
            fit = fit_fringe(FringeData.from_counts(phase, e, g, i))
        except EstimationError as exc:
            fit_notes.append(f"{_FIELD_NAMES[fld]}: no fit ({exc})")
            continue
        a, b, c = (float(v) for v in fit.coefficients)
        ax.plot(dense, a + b * np.cos(dense) + c * np.sin(dense), "-", color=colour, lw=1.5,
                label=f"{_FIELD_NAMES[fld]}: fit {a:.3f} {b:+.3f} cos φ {c:+.3f} sin φ",
                gid=f"fit-{fld}")
        if fit.dof > 0:
            fit_notes.append(f"{_FIELD_NAMES[fld]}: reduced chi2 {fit.chi2 / fit.dof:.2f} "
                             f"({fit.dof} dof, p = {fit_p_value(fit.chi2, fit.dof):.2g})")
    ax.set_xlim(0.0, 2.0 * math.pi)
    ax.set_ylim(-0.02, 1.02)
    ax.set_xticks([0, math.pi / 2, math.pi, 3 * math.pi / 2, 2 * math.pi],
                  ["0", "π/2", "π", "3π/2", "2π"])
    ax.set_xlabel("Ramsey phase φ (rad)")
    ax.set_ylabel("ground-state probability $P_g$ (dimensionless)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="best")
    _title(fig, run, f"fringes at {m.name} ({_fmt_setpoints(m.setpoints)})")
    shots = f", {m.shots_per_phase} shots per phase and field" if m.shots_per_phase else ""
    caption = (f"Ramsey fringes P_g(φ) of the empty and the one-photon field at {which}, "
               f"{m.name}{shots}. "
               f"Points: the fraction of detected atoms found in g, with {_level(level)} Wilson "
               "intervals (scipy.stats.binomtest); curves: a + b cos φ + c sin φ refitted from "
               "the journal's counts (weighted linear least squares, autotune.fringe). "
               + "; ".join(fit_notes) + ".")
    return fig, caption


def figure_progress(run: Run) -> tuple[Any, str] | None:
    """Figure 2: the best inversion measured so far, with its interval, against cumulative shots.

    Returns ``(figure, caption)``, or None before the second estimate.
    """
    done = [m for m in run.estimated if math.isfinite(m.value("inversion"))]
    if len(done) < 2:
        return None
    fig = _new_figure()
    ax = fig.add_subplot()
    shots = np.array([m.shots_after for m in done], dtype=float)
    inv = np.array([m.value("inversion") for m in done])
    low = np.array([m.value("inversion_low") for m in done])
    high = np.array([m.value("inversion_high") for m in done])
    best = np.zeros(len(done), dtype=int)
    for k in range(1, len(done)):
        best[k] = k if inv[k] > inv[best[k - 1]] else best[k - 1]
    ax.plot(shots, inv, ".", color="0.6", ms=4, label="each measurement", gid="measurements")
    ax.fill_between(shots, low[best], high[best], step="post", color="tab:blue", alpha=0.2,
                    label=f"its {_level(run.confidence)} interval")
    ax.step(shots, inv[best], where="post", color="tab:blue", lw=1.8, label="best so far",
            gid="best-so-far")
    final = run.final_measurement()
    if final is not None and final in done:
        k = done.index(final)
        _errorbar(ax, [shots[k]], [inv[k]], yerr=[[inv[k] - low[k]], [high[k] - inv[k]]], fmt="D",
                    color="tab:red", capsize=4, label=f"verified ({final.name})", gid="verified")
    from matplotlib.ticker import StrMethodFormatter

    ax.xaxis.set_major_formatter(StrMethodFormatter("{x:,.0f}"))
    ax.set_xlabel("cumulative shots (count)")
    ax.set_ylabel("fringe inversion (dimensionless)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="lower right")
    _title(fig, run, "best inversion so far")
    caption = ("The largest inversion measured so far (line) with that measurement's "
               f"{_level(run.confidence)} interval (band), against the shots acquired in the run; "
               "grey dots: every measurement. The maximum of noisy values is biased upward; the "
               "verification (red) is the unbiased figure.")
    return fig, caption


def _gp_surface(xy: np.ndarray, y: np.ndarray, stderr: np.ndarray,
                low: np.ndarray, high: np.ndarray, grid: int = 60
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Posterior mean of a Gaussian process through the points, on a grid over [low, high]."""
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern

    span = high - low
    unit = (xy - low) / span
    mean = float(np.mean(y))
    noise = np.clip(np.where(np.isfinite(stderr), stderr, 0.05), 1e-3, None) ** 2
    kernel = ConstantKernel(max(float(np.var(y)), 1e-4), (1e-5, 1.0)) * \
        Matern(length_scale=[0.3, 0.3], length_scale_bounds=(0.02, 10.0), nu=2.5)
    model = GaussianProcessRegressor(kernel, alpha=noise, n_restarts_optimizer=2,
                                     random_state=0)
    with warnings.catch_warnings():
        # Hyper-parameters at a bound are fine for a display surface.
        warnings.simplefilter("ignore", ConvergenceWarning)
        try:
            model.fit(unit, y - mean)
        except (ValueError, np.linalg.LinAlgError):
            return None
    gx = np.linspace(low[0], high[0], grid)
    gy = np.linspace(low[1], high[1], grid)
    mx, my = np.meshgrid(gx, gy)
    pts = (np.column_stack([mx.ravel(), my.ravel()]) - low) / span
    return mx, my, model.predict(pts).reshape(mx.shape) + mean


def figure_map(run: Run) -> tuple[Any, str] | None:
    """Figure 3: the measured points over the (velocity, detuning) box, over a model surface.

    Search points are numbered in order; other labels get their own markers. The surface is a
    Gaussian-process regression of every measured inversion (display only). Returns
    ``(figure, caption)``, or None with fewer than two measurements that have both set-points
    (the header gives a single point).
    """
    done = [m for m in run.estimated if {"velocity", "detuning"} <= set(m.setpoints)
            and math.isfinite(m.value("inversion"))]
    if len(done) < 2:
        return None
    fig = _new_figure(7.5, 5.2)
    ax = fig.add_subplot()
    vel = np.array([m.setpoints["velocity"] for m in done])
    det = np.array([m.setpoints["detuning"] / 1e3 for m in done])
    inv = np.array([m.value("inversion") for m in done])
    err = np.array([m.value("inversion_stderr") for m in done])
    box = run.box()
    if box is not None and "velocity" in box and "detuning" in box:
        low = np.array([box["velocity"][0], box["detuning"][0] / 1e3])
        high = np.array([box["velocity"][1], box["detuning"][1] / 1e3])
    else:
        low = np.array([vel.min(), det.min()])
        high = np.array([vel.max(), det.max()])
    low_all = np.minimum(low, [vel.min(), det.min()])
    high_all = np.maximum(high, [vel.max(), det.max()])
    truth = run.truth
    true_best = None
    if truth is not None and isinstance(truth.get("best_setpoints"), Mapping):
        tb = _setpoints(truth["best_setpoints"])
        if {"velocity", "detuning"} <= set(tb):
            true_best = (tb["velocity"], tb["detuning"] / 1e3)
            low_all = np.minimum(low_all, true_best)
            high_all = np.maximum(high_all, true_best)
    span = np.where(high_all > low_all, high_all - low_all, 1.0)
    low_all, high_all = low_all - 0.04 * span, high_all + 0.04 * span
    vmin, vmax = float(np.min(inv)), float(np.max(inv))
    model_note = "too few points for a model surface"
    xy = np.column_stack([vel, det])
    if len(done) >= 3 and np.all(np.ptp(xy, axis=0) > 0) and np.all(high > low):
        # Over the box (or the points' extent) only: outside it the model only extrapolates.
        surface = _gp_surface(xy, inv, err, low, high)
        if surface is not None:
            mx, my, mz = surface
            vmin, vmax = min(vmin, float(mz.min())), max(vmax, float(mz.max()))
            if vmax <= vmin:
                vmax = vmin + 1e-3
            from matplotlib.ticker import MaxNLocator

            levels = MaxNLocator(14).tick_values(vmin, vmax)
            vmin, vmax = float(levels[0]), float(levels[-1])
            cs = ax.contourf(mx, my, mz, levels=levels, cmap="viridis", alpha=0.55)
            fig.colorbar(cs, ax=ax, label="inversion: model and points (dimensionless)")
            model_note = ("background: Gaussian-process regression of the measured inversions "
                          "(Matérn ν = 5/2 kernel, each point's own standard error as its noise, "
                          "scikit-learn) over the box, for display only; it is not the search's "
                          "surrogate")
    if vmax <= vmin:
        vmax = vmin + 1e-3
    from matplotlib.lines import Line2D

    handles = []
    labels = list(dict.fromkeys(m.label for m in done))
    for label in labels:
        pick = np.array([m.label == label for m in done])
        ax.scatter(vel[pick], det[pick], c=inv[pick], cmap="viridis", vmin=vmin, vmax=vmax,
                   marker=_marker(label), s=46 if label in SEARCH_LABELS else 60, edgecolors="white",
                   linewidths=0.8, gid=f"points-{label}", zorder=3)
        # Legend entries in grey: the marker tells the label, the colour is the inversion.
        handles.append(Line2D([], [], marker=_marker(label), ls="none", color="0.45", mec="white",
                              ms=7, label=f"{label} ({int(pick.sum())})"))
    for m, v, d in zip(done, vel, det, strict=True):
        if m.label in SEARCH_LABELS:
            ax.annotate(str(m.point), (v, d), textcoords="offset points", xytext=(4, 3),
                        fontsize=6.5, color="black", zorder=4)
    if box is not None and "velocity" in box and "detuning" in box:
        from matplotlib.patches import Rectangle

        handles.append(ax.add_patch(Rectangle(
            (low[0], low[1]), high[0] - low[0], high[1] - low[1], fill=False, ls="--", lw=1.2,
            ec="black", label="search box", gid="box")))
    chosen = run.chosen
    if chosen is not None and {"velocity", "detuning"} <= set(chosen):
        handles += ax.plot(chosen["velocity"], chosen["detuning"] / 1e3, marker="*", ms=18,
                           mfc="none", mec="red", mew=1.8, ls="none", gid="chosen", zorder=5,
                           label="chosen" if run.chosen_is_verified
                           else "chosen (not yet verified)")
    outside = ""
    if true_best is not None:
        handles += ax.plot(*true_best, marker="P", ms=12, color="black", mfc="white", ls="none",
                           gid="true-best", zorder=5, label="true best (simulated)")
        if box is not None and not all(
                box[k][0] <= v <= box[k][1] for k, v in
                (("velocity", true_best[0]), ("detuning", true_best[1] * 1e3)) if k in box):
            outside = " The simulator's true best lies outside this stage's box."
    ax.set_xlim(low_all[0], high_all[0])
    ax.set_ylim(low_all[1], high_all[1])
    ax.set_xlabel("velocity set-point (m/s)")
    ax.set_ylabel("detuning set-point (kHz)")
    fig.legend(handles=handles, fontsize=7, loc="outside lower center", ncol=min(len(handles), 6))
    _title(fig, run, "measured points over the box")
    caption = (f"Every measured point over the (velocity, detuning) plane, coloured by its "
               f"measured inversion; search points numbered in the order measured; dashed: the "
               f"stage's search box; star: the chosen set-points. {model_note[0].upper()}"
               f"{model_note[1:]}.{outside}")
    return fig, caption


def figure_scan(run: Run) -> tuple[Any, str] | None:
    """Figure 4: inversion against detuning for detuning scans and lock steps.

    Uses the measurements labelled as in :data:`SCAN_LABELS`. Returns ``(figure, caption)``, or
    None when the run has none.
    """
    done = [m for m in run.estimated if m.label in SCAN_LABELS and "detuning" in m.setpoints
            and math.isfinite(m.value("inversion"))]
    if not done:
        return None
    fig = _new_figure()
    ax = fig.add_subplot()
    for label in dict.fromkeys(m.label for m in done):
        pick = [m for m in done if m.label == label]
        x = np.array([m.setpoints["detuning"] / 1e3 for m in pick])
        y = np.array([m.value("inversion") for m in pick])
        lo = np.array([m.value("inversion_low") for m in pick])
        hi = np.array([m.value("inversion_high") for m in pick])
        _errorbar(ax, x, y, yerr=[y - lo, hi - y], fmt=_marker(label), capsize=3, ms=6,
                    label=f"{label} ({len(pick)})", gid=f"scan-{label}")
    chosen = run.chosen
    if chosen is not None and "detuning" in chosen:
        ax.axvline(chosen["detuning"] / 1e3, color="red", ls="--", lw=1.2, gid="chosen",
                   label=f"chosen {chosen['detuning'] / 1e3:+.2f} kHz")
    ax.set_xlabel("detuning set-point (kHz)")
    ax.set_ylabel("fringe inversion (dimensionless)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="best")
    _title(fig, run, "detuning scan / lock steps")
    caption = (f"Inversion against detuning for the measurements labelled "
               f"{', '.join(sorted({m.label for m in done}))}, with their "
               f"{_level(run.confidence)} intervals; dashed: the chosen detuning.")
    return fig, caption


def figure_phase_shift(run: Run) -> tuple[Any, str] | None:
    """Figure 5: photon phase shift (units of pi) against detuning, wherever measured.

    Returns ``(figure, caption)``, or None with fewer than two identified estimates.
    """
    done = [m for m in run.estimated if "detuning" in m.setpoints
            and m.estimate.get("identified", True) and math.isfinite(m.value("phase_shift"))]
    if len(done) < 2:
        return None
    fig = _new_figure()
    ax = fig.add_subplot()
    x = np.array([m.setpoints["detuning"] / 1e3 for m in done])
    y = np.array([m.value("phase_shift") / math.pi for m in done])
    e = np.array([m.value("phase_shift_stderr") / math.pi for m in done])
    ax.errorbar(x, y, yerr=np.where(np.isfinite(e), e, 0.0), fmt="none", ecolor="0.5",
                capsize=2, lw=0.8, zorder=1)
    vel = [m.setpoints.get("velocity", math.nan) for m in done]
    if all(math.isfinite(v) for v in vel) and np.ptp(vel) > 0:
        sc = ax.scatter(x, y, c=vel, cmap="plasma", s=24, zorder=2, gid="phase-shift")
        fig.colorbar(sc, ax=ax, label="velocity set-point (m/s)")
    else:
        ax.scatter(x, y, color="tab:blue", s=24, zorder=2, gid="phase-shift")
    ax.axhline(1.0, color="black", lw=1.0, ls=":", label="π (the 2π condition)")
    final = run.final_measurement()
    if final is not None and final in done:
        ax.plot(final.setpoints["detuning"] / 1e3, final.value("phase_shift") / math.pi,
                marker="*", ms=16, mfc="none", mec="red", mew=1.6, ls="none", gid="chosen",
                label=f"chosen ({final.name})")
    ax.set_xlabel("detuning set-point (kHz)")
    ax.set_ylabel("photon phase shift (π rad)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="best")
    _title(fig, run, "photon phase shift")
    caption = ("The angle between the one-photon and the empty fringe, in units of π, with one "
               "standard error, at every measured point, coloured by velocity. At the 2π "
               "condition it is π; detuning turns it one way or the other (PHYSICS.md §5b).")
    return fig, caption


def _timeline_items(runs: Sequence[Run]) -> tuple[bool, float, str]:
    """Whether rig clocks can be chained across ``runs``; the time origin and axis label."""
    use_clock = all(r.clock_start is not None for r in runs)
    previous = -math.inf
    for r in runs:
        if not use_clock:
            break
        if r.clock_start is not None and r.clock_start < previous - 1e-6:
            use_clock = False  # a rig restarted between runs: its clock began again
        previous = r.clock_end if r.clock_end is not None else previous
    if use_clock:
        return True, float(runs[0].clock_start), "rig time since the first run started (h)"
    starts = [_parse_time(r.records[0].get("t_wall")) for r in runs if r.records]
    origin = min((s for s in starts if s is not None), default=None)
    return False, origin.timestamp() if origin else 0.0, \
        "wall time since the first run started (h)"


def _when(use_clock: bool, origin: float, clock: float | None, t_wall: Any) -> float:
    if use_clock:
        return (clock - origin) / 3600.0 if clock is not None else math.nan
    when = _parse_time(t_wall)
    return (when.timestamp() - origin) / 3600.0 if when is not None else math.nan


def _detuning_of(value: Any) -> float:
    if isinstance(value, Mapping):
        value = value.get("detuning")
    return float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) \
        else math.nan


def figure_timeline(runs: Sequence[Run], night: bool = True) -> tuple[Any, str] | None:
    """Figure 6: inversion, detuning set-point and corrections against rig time.

    Corrections are decisions with ``what == "correct"`` (their ``from``/``to`` set-points give
    the size) and, for a folder of retune runs, each retune that moved the set-points away from
    its check. Rig clocks are chained across runs while they increase; after a rig restart the
    axis falls back to wall time (said on the axis). Returns ``(figure, caption)``, or None
    without any estimate.
    """
    if not any(r.estimated for r in runs):
        return None
    use_clock, origin, xlabel = _timeline_items(runs)
    fig = _new_figure(9.0, 7.0)
    ax_inv, ax_det, ax_cor = fig.subplots(3, 1, sharex=True, height_ratios=[3, 2, 1.4])
    done = [(r, m) for r in runs for m in r.estimated if math.isfinite(m.value("inversion"))]
    labels = list(dict.fromkeys(m.label for _, m in done))
    for label in labels:
        pick = [m for _, m in done if m.label == label]
        t = np.array([_when(use_clock, origin, m.clock_s, m.t_wall) for m in pick])
        y = np.array([m.value("inversion") for m in pick])
        # The same intervals as everywhere else (the run's confidence, within [0, 1]).
        lo = np.array([m.value("inversion_low") for m in pick])
        hi = np.array([m.value("inversion_high") for m in pick])
        e = np.vstack([np.where(np.isfinite(lo), y - lo, 0.0), np.where(np.isfinite(hi), hi - y, 0.0)])
        _errorbar(ax_inv, t, y, yerr=np.clip(e, 0.0, None), fmt=_marker(label), ms=4,
                        capsize=2, lw=0.8, label=f"{label} ({len(pick)})", gid=f"inv-{label}")
    if len(runs) > 1:
        for r in runs:
            start = _when(use_clock, origin, r.clock_start,
                          r.records[0].get("t_wall") if r.records else None)
            if not math.isfinite(start):
                continue
            for ax in (ax_inv, ax_det, ax_cor):
                ax.axvline(start, color="0.7", lw=0.8, ls="--", zorder=0)
            if len(runs) <= _NAMED_RUNS_MAX:
                ax_inv.annotate(r.name, (start, 1.0), xycoords=("data", "axes fraction"),
                                xytext=(2, -2), textcoords="offset points", fontsize=7,
                                va="top", color="0.35", rotation=90)
    ax_inv.set_ylabel("fringe inversion (dimensionless)")
    ax_inv.grid(alpha=0.3)
    ax_inv.legend(fontsize=7, loc="best", ncol=2)

    steps = []
    for r in runs:
        for mv in r.moves:
            if "detuning" in mv["setpoints"]:
                steps.append((_when(use_clock, origin, mv["clock"], mv["t_wall"]),
                              mv["setpoints"]["detuning"] / 1e3))
    steps.sort()
    if steps:
        ax_det.step([s[0] for s in steps], [s[1] for s in steps], where="post", color="0.4",
                    lw=1.0, label="applied (moves)", gid="moves")
    measured = [(_when(use_clock, origin, m.clock_s, m.t_wall), m.setpoints["detuning"] / 1e3)
                for _, m in done if "detuning" in m.setpoints]
    if measured:
        ax_det.plot([p[0] for p in measured], [p[1] for p in measured], ".", ms=4,
                    color="tab:blue", label="measurements", gid="measured-detuning")
    true_marks = []
    for r in runs:
        truth = r.truth
        if truth is not None and isinstance(truth.get("best_setpoints"), Mapping):
            d = _detuning_of(truth["best_setpoints"])
            if math.isfinite(d):
                true_marks.append((_when(use_clock, origin, r.clock_end,
                                         r.records[-1].get("t_wall") if r.records else None),
                                   d / 1e3))
    if true_marks:
        ax_det.plot([p[0] for p in true_marks], [p[1] for p in true_marks], "P", ms=9,
                    color="black", mfc="white", label="true best (simulated)", gid="true-best")
    ax_det.set_ylabel("detuning set-point (kHz)")
    ax_det.grid(alpha=0.3)
    ax_det.legend(fontsize=7, loc="best")

    decided, retuned = [], []
    for r in runs:
        for d in r.decisions:
            if d["what"] == "correct":
                size = _detuning_of(d.get("to")) - _detuning_of(d.get("from"))
                decided.append((_when(use_clock, origin, d.get("clock"), d.get("t_wall")), size))
        check = [m for m in r.estimated if m.label == "check"]
        chosen = r.chosen
        if r.result and check and chosen and r.status == "accepted" and \
                not _same_setpoints(check[0].setpoints, chosen):
            size = _detuning_of(chosen) - _detuning_of(check[0].setpoints)
            retuned.append((_when(use_clock, origin, r.clock_end,
                                  r.records[-1].get("t_wall")), size))
    for series, name, colour, gid in ((decided, "correct decisions", "tab:orange", "corrections"),
                                      (retuned, "retunes", "tab:purple", "retunes")):
        if not series:
            continue
        t = np.array([s[0] for s in series])
        size = np.array([s[1] for s in series]) / 1e3
        known = np.isfinite(size)
        ax_cor.vlines(t[known], 0.0, size[known], color=colour, lw=1.5)
        ax_cor.plot(t[known], size[known], "o", color=colour, ms=5, label=name, gid=gid)
        if np.any(~known):
            ax_cor.plot(t[~known], np.zeros(int((~known).sum())), "o", mfc="none", mec=colour,
                        ms=6, label=f"{name} (size not recorded)", gid=f"{gid}-unsized")
    ax_cor.axhline(0.0, color="black", lw=0.6)
    ax_cor.set_ylabel("correction (kHz)")
    ax_cor.set_xlabel(xlabel)
    ax_cor.grid(alpha=0.3)
    if decided or retuned:
        ax_cor.legend(fontsize=7, loc="best")
    else:
        ax_cor.text(0.5, 0.5, "no corrections", transform=ax_cor.transAxes, ha="center",
                    va="center", fontsize=8, color="0.4")
    what = "night" if night else "timeline"
    _title(fig, None, f"{what}: {runs[0].path.parent.name if len(runs) > 1 else runs[0].name}")
    level = _level(runs[0].confidence)
    caption = (f"Top: the inversion of every measurement with its {level} interval against "
               f"{'rig' if use_clock else 'wall'} time; middle: the detuning set-point applied "
               "(moves) and measured; bottom: detuning corrections, from 'correct' decisions "
               "(to minus from) and from retunes that left their check point."
               + ("" if use_clock else " The rig clock restarted between runs, so the axis is "
                  "wall time."))
    return fig, caption


# --------------------------------------------------------------------------------------------
# The report
# --------------------------------------------------------------------------------------------


@dataclass
class ReportFigure:
    """A drawn figure: ``key`` (file stem), its section, the Figure, caption and PNG bytes."""

    key: str
    section: str
    figure: Any
    caption: str
    png: bytes = b""
    file: Path | None = None


@dataclass
class Report:
    """Everything a report shows: the runs, their headers and flags, the figures."""

    path: Path
    runs: list[Run]
    headers: dict[str, list[tuple[str, str]]]
    flags: dict[str, list[Flag]]
    figures: list[ReportFigure]

    @property
    def multi(self) -> bool:
        """True for a folder of run folders."""
        return len(self.runs) > 1 or self.runs[0].path != self.path

    @property
    def all_flags(self) -> list[tuple[str, Flag]]:
        """Every flag with the name of its run."""
        return [(name, f) for name, flags in self.flags.items() for f in flags]


_RUN_FIGURES = (("fringes", figure_fringes), ("progress", figure_progress), ("map", figure_map),
                ("scan", figure_scan), ("phase-shift", figure_phase_shift))


def build_report(path: Path, *, draw: bool = True) -> Report:
    """Read ``path`` (a run folder or a folder of them) and build its report.

    Parameters
    ----------
    path : Path
        A run folder, a dry run's output folder or a ``track`` folder.
    draw : bool
        Draw the figures (matplotlib Figures, not yet saved); False for text only.

    Raises
    ------
    JournalError
        ``path`` is not a run folder and holds none, or a file in it is missing or damaged.
    """
    path = Path(path)
    runs = [load_run(p) for p in find_runs(path)]
    names = _unique_names(runs)
    headers = {names[id(r)]: _header(r) for r in runs}
    flags = {names[id(r)]: run_flags(r) for r in runs}
    figures: list[ReportFigure] = []
    if draw:
        multi = len(runs) > 1 or runs[0].path != path
        night = any(r.command == "track" or r.name.startswith("cycle-") for r in runs)
        if multi or runs[0].command == "track":
            drawn = figure_timeline(runs, night=night)
            if drawn is not None:
                figures.append(ReportFigure("night" if night else "timeline", "", *drawn))
        for r in runs:
            for key, draw_one in _RUN_FIGURES:
                drawn = draw_one(r)
                if drawn is not None:
                    figures.append(ReportFigure(key, names[id(r)] if multi else "", *drawn))
    return Report(path, runs, headers, flags, figures)


def _unique_names(runs: Sequence[Run]) -> dict[int, str]:
    seen: Counter[str] = Counter()
    out = {}
    for r in runs:
        seen[r.name] += 1
        out[id(r)] = r.name if seen[r.name] == 1 else f"{r.name}-{seen[r.name]}"
    return out


def _fmt_flags(report: Report) -> list[str]:
    flags = report.all_flags
    if not flags:
        return ["look at this: nothing flagged"]
    lines = ["look at this:"]
    for name, flag in flags:
        where = f"{name}: " if report.multi else ""
        lines.append(f"  ! {where}{flag.text}")
    return lines


def _measurement_rows(run: Run) -> list[str]:
    done = run.estimated
    if not done:
        return ["  no measurement estimated yet"]
    if len(done) > _TEXT_TABLE_MAX:
        lines = [f"  {len(done)} measurements (the table is in {HTML_NAME}):"]
        for label in dict.fromkeys(m.label for m in done):
            inv = [m.value("inversion") for m in done if m.label == label]
            lines.append(f"  {label:<8} {len(inv):>5}  inversion min {np.nanmin(inv):.3f}, "
                         f"median {np.nanmedian(inv):.3f}, max {np.nanmax(inv):.3f}")
        return lines
    lines = [f"{'label':<7} {'#':>3} {'velocity m/s':>12} {'detuning kHz':>12} "
             f"{'inversion':>9} {'interval':<14} {'phase/pi':>8} {'fit p':>7}"]
    for m in done:
        p = min((fit_p_value(m.value(f"chi2_{f}"), int(m.value(f"dof_{f}") or 0))
                 for f in _FIELDS), default=math.nan)
        lines.append(
            f"{m.label:<7} {m.point:>3} {m.setpoints.get('velocity', math.nan):>12.1f} "
            f"{m.setpoints.get('detuning', math.nan) / 1e3:>12.2f} {m.value('inversion'):>9.3f} "
            f"[{m.value('inversion_low'):.3f}, {m.value('inversion_high'):.3f}] "
            f"{m.value('phase_shift') / math.pi:>8.3f} {p:>7.1e}")
    return lines


def _overview_line(name: str, run: Run) -> str:
    result = run.result or {}
    verified = _interval(result)
    inv = f"{verified[0]:.3f} [{verified[1]:.3f}, {verified[2]:.3f}]" if verified else "-"
    chosen = run.chosen or {}
    ratio = "-"
    truth = run.truth
    if truth is not None:
        try:
            ratio = f"{float(truth['inversion_at_chosen']) / float(truth['best_inversion']):.3f}"
        except (KeyError, TypeError, ValueError, ZeroDivisionError):
            pass
    return (f"{name:<12} {run.status:<17} {inv:>22} "
            f"{chosen.get('velocity', math.nan):>8.1f} "
            f"{chosen.get('detuning', math.nan) / 1e3:>9.2f} "
            f"{int(_number(result, 'shots', run.shots)):>9,} "
            f"{_duration(_number(result, 'rig_time_s', run.rig_time_s)):>10} {ratio:>6}")


def format_text(report: Report) -> str:
    """The short text summary: flags first, then each run's header and measurements.

    A folder of more than three runs gets one line per run instead of a section each.
    """
    lines = [f"autotune report of {report.path}"]
    lines += _fmt_flags(report)
    names = list(report.headers)
    if report.multi:
        lines += ["", f"{'run':<12} {'status':<17} {'verified inversion':>22} {'v m/s':>8} "
                  f"{'det. kHz':>9} {'shots':>9} {'rig time':>10} {'ratio':>6}"]
        lines += [_overview_line(name, r) for name, r in zip(names, report.runs, strict=True)]
    if not report.multi or len(report.runs) <= _TEXT_SECTIONS_MAX:
        for name, run in zip(names, report.runs, strict=True):
            lines += ["", f"== {name} ({run.path})"]
            lines += [f"  {key:<19} {value}" for key, value in report.headers[name]]
            lines.append("")
            lines += _measurement_rows(run)
            notes = _notes(run)
            lines += [f"  note: {n}" for n in notes]
    return "\n".join(lines)


def _notes(run: Run) -> list[str]:
    notes = []
    if run.unknown:
        kinds = ", ".join(f"{k} ({n})" for k, n in sorted(run.unknown.items()))
        notes.append(f"journal record types not drawn by this report: {kinds}")
    return notes


# --------------------------------------------------------------------------------------------
# HTML
# --------------------------------------------------------------------------------------------

_CSS = """
body { font-family: sans-serif; margin: 1.5em auto; max-width: 1100px; color: #222; }
h1 { font-size: 1.4em; } h2 { font-size: 1.2em; border-bottom: 1px solid #ccc; }
.flags { background: #fff4e5; border: 2px solid #e08a00; padding: 0.4em 1em; }
.flags.clear { background: #eef7ee; border-color: #4a9a4a; }
.flags li { margin: 0.2em 0; }
table { border-collapse: collapse; font-size: 0.85em; }
td, th { padding: 0.15em 0.6em; border-bottom: 1px solid #eee; text-align: left; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
figure { margin: 1em 0; } figure img { max-width: 100%; border: 1px solid #ddd; }
figcaption { font-size: 0.85em; color: #444; max-width: 900px; }
.meta { color: #666; font-size: 0.85em; }
"""


def _esc(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _figure_html(fig: ReportFigure) -> str:
    data = base64.b64encode(fig.png).decode("ascii")
    return (f'<figure id="fig-{_esc(fig.section or "run")}-{_esc(fig.key)}">'
            f'<img alt="{_esc(fig.key)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{_esc(fig.caption)}</figcaption></figure>")


def _flags_html(report: Report) -> str:
    flags = report.all_flags
    if not flags:
        return '<section class="flags clear"><h2>Look at this</h2><p>nothing flagged</p></section>'
    items = "".join(f"<li><b>{_esc(name + ': ') if report.multi else ''}</b>{_esc(f.text)}</li>"
                    for name, f in flags)
    return f'<section class="flags"><h2>Look at this</h2><ul>{items}</ul></section>'


def _table_html(run: Run) -> str:
    rows = []
    for m in run.estimated:
        p = min((fit_p_value(m.value(f"chi2_{f}"), int(m.value(f"dof_{f}") or 0))
                 for f in _FIELDS), default=math.nan)
        cells = [m.label, m.point, f"{m.setpoints.get('velocity', math.nan):.1f}",
                 f"{m.setpoints.get('detuning', math.nan) / 1e3:+.2f}",
                 f"{m.value('inversion'):.3f}",
                 f"[{m.value('inversion_low'):.3f}, {m.value('inversion_high'):.3f}]",
                 f"{m.value('phase_shift') / math.pi:.3f} ± "
                 f"{m.value('phase_shift_stderr') / math.pi:.3f}",
                 f"{m.value('absorption'):.3f}", f"{p:.2g}", f"{m.shots_after:,}"]
        rows.append("<tr>" + "".join(f'<td class="num">{_esc(c)}</td>' for c in cells) + "</tr>")
    head = ("<tr><th>label</th><th>#</th><th>velocity (m/s)</th><th>detuning (kHz)</th>"
            f"<th>inversion</th><th>{_esc(_level(run.confidence))} interval</th>"
            "<th>phase shift (π rad)</th><th>absorption</th><th>fit p</th>"
            "<th>cumulative shots</th></tr>")
    return (f"<details><summary>measurements ({len(rows)})</summary>"
            f"<table>{head}{''.join(rows)}</table></details>")


def _decisions_html(run: Run) -> str:
    items = "".join(f"<li><b>{_esc(d['what'])}</b>: {_esc(d['reason'])}</li>"
                    for d in run.decisions)
    return f"<details><summary>decisions ({len(run.decisions)})</summary><ul>{items}</ul></details>"


def render_html(report: Report) -> str:
    """The self-contained page: inline CSS, figures as data URIs, no script, no network."""
    names = list(report.headers)
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>autotune report: {_esc(report.path.name)}</title>",
             f"<style>{_CSS}</style></head><body>",
             f"<h1>autotune report: {_esc(report.path)}</h1>",
             f'<p class="meta">written {_esc(datetime.now(UTC).isoformat(timespec="seconds"))}'
             " from the run files (read only; no rig was contacted)</p>",
             _flags_html(report)]
    lead = [f for f in report.figures if f.section == ""] if report.multi else []
    if report.multi:
        head = ("<tr><th>run</th><th>command</th><th>status</th><th>verified inversion</th>"
                "<th>chosen set-points</th><th>shots</th><th>rig time</th></tr>")
        rows = []
        for name, run in zip(names, report.runs, strict=True):
            hdr = dict(report.headers[name])
            rows.append("<tr>" + "".join(f"<td>{_esc(c)}</td>" for c in (
                name, run.command, run.status, hdr.get("verified inversion", "-"),
                hdr.get("chosen set-points", "-"),
                f"{int(_number(run.result or {}, 'shots', run.shots)):,}",
                _duration(_number(run.result or {}, "rig_time_s", run.rig_time_s)))) + "</tr>")
        parts.append(f"<section><h2>Runs</h2><table>{head}{''.join(rows)}</table></section>")
        parts += [_figure_html(f) for f in lead]
    for name, run in zip(names, report.runs, strict=True):
        section = name if report.multi else ""
        anchor = re.sub(r"[^A-Za-z0-9_-]", "-", name)
        parts.append(f'<section id="run-{_esc(anchor)}"><h2>{_esc(name)}</h2>')
        parts.append('<table class="header">' + "".join(
            f"<tr><th>{_esc(k)}</th><td>{_esc(v)}</td></tr>" for k, v in report.headers[name])
            + f"<tr><th>folder</th><td>{_esc(run.path)}</td></tr></table>")
        if report.multi:
            own = report.flags[name]
            if own:
                parts.append("<ul>" + "".join(f"<li>{_esc(f.text)}</li>" for f in own) + "</ul>")
        figs = [f for f in report.figures if f.section == section and f not in lead]
        parts += [_figure_html(f) for f in figs]
        if not figs:
            parts.append("<p>no figure: nothing measured yet</p>")
        parts.append(_table_html(run))
        parts.append(_decisions_html(run))
        for note in _notes(run):
            parts.append(f'<p class="meta">note: {_esc(note)}</p>')
        parts.append("</section>")
    parts.append("</body></html>")
    return "\n".join(parts)


# --------------------------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------------------------


def _png(fig: Any) -> bytes:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=_DPI)
    return buffer.getvalue()


def _overview_sheet(figures: Sequence[ReportFigure], path: Path) -> None:
    """Tile already rendered PNGs into one image (at most six)."""
    import matplotlib.image as mpimg

    figures = list(figures)[:6]
    columns = 2 if len(figures) > 1 else 1
    rows = math.ceil(len(figures) / columns)
    sheet = _new_figure(7.0 * columns, 4.6 * rows)
    for k, fig in enumerate(figures):
        ax = sheet.add_subplot(rows, columns, k + 1)
        ax.imshow(mpimg.imread(io.BytesIO(fig.png), format="png"))
        ax.set_axis_off()
    sheet.savefig(path, dpi=_DPI)


def _write_bytes(path: Path, data: bytes) -> None:
    try:
        path.write_bytes(data)
    except OSError as exc:
        raise JournalError(f"cannot write {path}: {exc} (write elsewhere with --out DIR)") from exc


def write_report(run_dir: Path, *, plot: bool = True, out: Path | None = None) -> str:
    """Report ``run_dir``; with ``plot``, write its figures, overview and HTML page.

    Parameters
    ----------
    run_dir : Path
        A run folder, a dry run's output folder or a ``track`` folder.
    plot : bool
        False: text only, nothing is written.
    out : Path, optional
        Folder for the figures and the page (default: ``run_dir``; created if missing).

    Returns
    -------
    str
        The text summary, ending with the paths written.

    Raises
    ------
    JournalError
        Not a run folder, missing or damaged files, or an output that cannot be written.
    """
    run_dir = Path(run_dir)
    report = build_report(run_dir, draw=plot)
    text = format_text(report)
    if not plot:
        return text
    target = Path(out) if out is not None else run_dir
    try:
        target.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise JournalError(f"cannot create {target}: {exc} (write elsewhere with --out DIR)") \
            from exc
    for fig in report.figures:
        fig.png = _png(fig.figure)
        stem = "-".join(s for s in ("report", _safe(fig.section), fig.key) if s)
        fig.file = target / f"{stem}.png"
        _write_bytes(fig.file, fig.png)
    page = target / HTML_NAME
    _write_bytes(page, render_html(report).encode("utf-8"))
    lines = [text, ""]
    if report.figures:
        if report.multi:
            latest = _unique_names(report.runs)[id(report.runs[-1])]
            sheet = [f for f in report.figures if f.section in ("", latest)]
        else:
            sheet = report.figures
        try:
            _overview_sheet(sheet, target / FIGURE_NAME)
        except OSError as exc:
            raise JournalError(f"cannot write {target / FIGURE_NAME}: {exc} (write elsewhere "
                               "with --out DIR)") from exc
        lines.append(f"figures: {len(report.figures)} in {target} "
                     f"({', '.join(f.file.name for f in report.figures[:6])}"
                     f"{', ...' if len(report.figures) > 6 else ''}); overview {FIGURE_NAME}")
    lines.append(f"page: {page}")
    return "\n".join(lines)


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]", "-", name)
