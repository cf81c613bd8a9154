"""Progress of a running stage as plain numbers, for whoever displays it.

The loop (:class:`autotune.run.loop.Session`) calls a *progress observer* with a
:class:`StageProgress` when a stage starts, after every acquisition and after every estimate.
It is display data only: it never enters the journal, and an observer that raises is dropped
(with one warning in the log) rather than allowed to stop a run. Rendering lives in the CLI;
nothing here writes to a terminal.

Units are SI (shots, s, inversion as a fraction); a display converts them.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Literal

__all__ = ["StageProgress", "NightProgress", "ProgressObserver", "SEARCH_DONE_LABELS",
           "rough_duration_text", "count_text", "setpoint_value_text", "setpoints_text"]

#: Measurement labels that come after the search has stopped: only their own shots are left.
SEARCH_DONE_LABELS = ("verify", "correct")


@dataclass(frozen=True)
class StageProgress:
    """Where a calibration or a retune stands.

    Attributes
    ----------
    stage : str
        ``"calibrate"`` or ``"retune"``.
    event : {"start", "acquisition", "estimate", "end"}
        What just happened: the stage began (or resumed), an acquisition's counts arrived, a
        measurement was estimated, or the stage ended (nothing more to go).
    label : str
        Label of the measurement in progress or just finished (``check``, ``lock``, ``point``,
        ``refine``, ``verify``, ...), ``""`` at the start.
    step : int
        Search steps finished (those counted against the point budget).
    max_steps : int
        The point budget of the search.
    shots : int
        Shots this stage has taken so far (resumed runs included).
    max_shots : int
        The shot budget of the search.
    rig_time_s : float
        Rig time those shots took (s).
    max_rig_time_s : float
        The rig-time budget of the search (s).
    measurement_shots : int
        Shots taken of the measurement in progress (or just finished).
    measurement_shots_planned : int
        Shots that measurement takes when complete (both fields, every Ramsey phase).
    best_inversion : float or None
        Highest inversion measured in this stage so far.
    best_interval : (float, float) or None
        Its interval at the configured confidence.
    best_setpoints : Mapping[str, float]
        Where it was measured (m/s, Hz); empty before the first estimate.
    confidence : float
        Level of that interval.
    remaining_s : float
        Rig time still to go at most (s), at the rig's repetition rate: the rest of the
        measurement in progress, then, while searching, the rest of the budget and one
        verification.
    repetition_rate_hz : float
        The rig's samples per second.
    clock_s : float
        The rig's clock at the last reply (s).
    """

    stage: str
    event: Literal["start", "acquisition", "estimate", "end"]
    label: str
    step: int
    max_steps: int
    shots: int
    max_shots: int
    rig_time_s: float
    max_rig_time_s: float
    measurement_shots: int
    measurement_shots_planned: int
    best_inversion: float | None
    best_interval: tuple[float, float] | None
    best_setpoints: Mapping[str, float] = field(default_factory=dict)
    confidence: float = 0.95
    remaining_s: float = 0.0
    repetition_rate_hz: float = 0.0
    clock_s: float = 0.0


@dataclass(frozen=True)
class NightProgress:
    """Where a night of ``track`` stands, between its stages (a stage in the night tells its
    own :class:`StageProgress`).

    Attributes
    ----------
    event : {"check", "wait"}
        A check was just assessed, or the night waits for the next one.
    night_s : float
        Rig time since the night began (s).
    end_s : float or None
        Rig time at which the night ends (s after it began), ``None`` without a rig-time end.
    setpoints : Mapping[str, float]
        The set-points held (m/s, Hz).
    checks, corrections, alarms, retunes, calibrations : int
        Counts since the night began.
    holding_share : float or None
        Share of the night's rig time spent holding (checks and recoveries).
    budget_fraction : float
        The configured largest share.
    inversion, interval : float or None, (float, float) or None
        The last check's inversion and its interval.
    action : str
        What the last check decided (``hold``, ``correct``, ``recheck``, ``alarm``), ``""``
        before the first.
    next_in_s : float or None
        Rig time to the next check (s), on a ``wait``.
    """

    event: Literal["check", "wait"]
    night_s: float
    end_s: float | None
    setpoints: Mapping[str, float]
    checks: int
    corrections: int
    alarms: int
    retunes: int
    calibrations: int
    holding_share: float | None
    budget_fraction: float
    inversion: float | None = None
    interval: tuple[float, float] | None = None
    action: str = ""
    next_in_s: float | None = None


#: A callable told every :class:`StageProgress` of a stage (and, in a night, every
#: :class:`NightProgress`).
ProgressObserver = Callable[[StageProgress | NightProgress], None]


def setpoint_value_text(name: str, value: float) -> str:
    """One set-point's value as a physicist reads it: velocity to 0.1 m/s, detuning in kHz to
    0.01 (the API stays in SI: m/s, Hz)."""
    if name == "velocity":
        return f"{value:.1f} m/s"
    if name == "detuning":
        return f"{value / 1e3:+.2f} kHz"
    return f"{value:.6g}"


def setpoints_text(setpoints: Mapping[str, float]) -> str:
    """``"velocity 509.2 m/s, detuning -4.06 kHz"``: velocity and detuning first, others after."""
    ordered = [k for k in ("velocity", "detuning") if k in setpoints] + \
        sorted(k for k in setpoints if k not in ("velocity", "detuning"))
    return ", ".join(f"{k} {setpoint_value_text(k, float(setpoints[k]))}" for k in ordered)


def count_text(n: int, noun: str) -> str:
    """``"1 check"``, ``"3 checks"``."""
    return f"{n} {noun}" + ("" if n == 1 else "s")


def rough_duration_text(seconds: float) -> str:
    """A duration rounded as a live display shows it (a time to go, a time elapsed): whole
    seconds below 90 s, else whole minutes: ``"45 s"``, ``"12 min"``, ``"2 h 05 min"``.

    The report's measured durations keep their decimals instead
    (:func:`autotune.report.model.measured_duration_text`).

    Parameters
    ----------
    seconds : float
        The duration (s); a negative one reads as ``"0 s"``.
    """
    seconds = max(0.0, float(seconds))
    if seconds < 90.0:
        return f"{seconds:.0f} s"
    minutes = round(seconds / 60.0)
    if minutes < 60:
        return f"{minutes} min"
    return f"{minutes // 60} h {minutes % 60:02d} min"
