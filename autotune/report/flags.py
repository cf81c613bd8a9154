"""What a person should look at first in a run (the report's flags)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from scipy import special

from autotune.progress import setpoint_value_text
from autotune.report.model import (FIELD_NAMES, SEARCH_LABELS, Measurement, Run,
                                   measured_duration_text, parse_time)
from autotune.wire.rig import FIELDS

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
#: Decisions (``what``) that are flagged with their reason wherever they occur (``adopt``: a
#: night held the point of a retune that was not accepted).
ALARM_DECISIONS = frozenset({"alarm", "rig_mismatch", "adopt"})
#: Ended statuses that mean the run stopped before its result.
BAD_ENDINGS = frozenset({"interrupted", "aborted", "failed"})


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


def fit_p_value(chi2: float, dof: int) -> float:
    """Upper-tail probability of a chi-square ``chi2`` with ``dof`` degrees (NaN if dof < 1)."""
    if not (dof >= 1 and math.isfinite(chi2)):
        return math.nan
    # scipy.special.chdtrc is the chi-square upper tail that scipy.stats.chi2.sf evaluates; called
    # directly, a report that draws no fringe figure never imports scipy.stats.
    return float(special.chdtrc(dof, chi2))


def _poor_fits(m: Measurement) -> list[tuple[str, float, int, float]]:
    out = []
    for fld in FIELDS:
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
        ``damaged_journal``: no end record before the journal's first damaged line;
        ``did_not_end``: no end record (still running, or killed); ``ended_badly``: ended
        interrupted, aborted or failed; ``below_acceptance``; ``safe_failed``: the return to
        safe set-points failed; ``alarm``: an alarm-like decision; ``edge_pile``: more than a
        third of a stage's search points within 2 % of the box width of one edge;
        ``edge_choice``: the chosen set-points within 2 % of an edge; ``phase_shift``: the
        chosen point's phase shift more than 3 standard errors and more than 0.1 pi from pi;
        ``poor_fit``: a fringe fit whose chi-square p-value is below 0.001.
    """
    flags: list[Flag] = []
    if run.ended is None and run.damage is not None:
        flags.append(Flag("damaged_journal", (
            f"the journal is damaged at line {run.damage.line} (see the note at the top): what "
            f"the run did after it, and whether it ended, is not shown; it cannot be resumed, "
            f"a new run (--out) starts afresh")))
    elif run.ended is None:
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
        said = [d["reason"] for d in run.decisions if d["what"] == "below_acceptance"]
        reason = (run.result or {}).get("reason") or (said[-1] if said else
                                                      "its verification missed [acceptance]")
        flags.append(Flag("below_acceptance", f"not accepted ({reason}); the last good "
                          f"calibration was kept, and the rig left where [acceptance] on_reject "
                          f"says (its safe set-points by default)"))
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
            flags.append(Flag("poor_fit", f"poor fringe fit of {m.name} ({FIELD_NAMES[fld]}): "
                              f"reduced chi2 {chi2 / dof:.2f} ({chi2:.1f} for {dof} dof), "
                              f"p = {p:.1e}"))
    if len(poor) > 3:
        flags.append(Flag("poor_fit", f"{len(poor) - 3} more measurements with a poor fringe "
                          f"fit (p < {FIT_P_VALUE:g}); see the measurement table"))
    return flags


def _age(t_wall: Any) -> str:
    when = parse_time(t_wall)
    if when is None:
        return ""
    seconds = (datetime.now(UTC) - when).total_seconds()
    return f" ({measured_duration_text(seconds)} ago)" if seconds >= 0 else ""


