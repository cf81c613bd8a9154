"""The report's words: each run's header and the text summary printed on the terminal."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from autotune.progress import count_text
from autotune.report.flags import fit_p_value
from autotune.report.model import (HTML_NAME, SEARCH_LABELS, Measurement, Run, format_setpoints,
                                   level_label, measured_duration_text, number_at, parse_time,
                                   read_setpoints)
from autotune.wire.rig import FIELDS

if TYPE_CHECKING:
    from autotune.report.build import Report

# Above this many measurements a text summary gives one line per label instead of a table.
_TEXT_TABLE_MAX = 80
# Above this many runs in a folder, the text gives one line per run instead of a section each.
_TEXT_SECTIONS_MAX = 3
# Above this many runs, the timeline marks where each starts but no longer names it.


def _interval(result: Mapping[str, Any]) -> tuple[float, float, float] | None:
    """The result's inversion and interval, or None if absent or not numbers."""
    pair = result.get("inversion_interval")
    inv = number_at(result, "inversion")
    if not (isinstance(pair, Sequence) and len(pair) == 2 and math.isfinite(inv)):
        return None
    low, high = (number_at(v) for v in pair)
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
        rows.append(("held set-points", format_setpoints(read_setpoints(result["setpoints"]))
                     if held else "none (no stage was accepted)"))
        counts = ", ".join(count_text(int(result.get(k, 0)), k[:-1]) for k in (
            "checks", "rechecks", "corrections", "alarms", "retunes", "calibrations",
            "failures"))
        rows.append(("night", f"{measured_duration_text(number_at(result, 'night_rig_time_s'))} of "
                     f"rig time: {counts}"))
        share = result.get("holding_share")
        rows.append(("beam on holding", ("-" if share is None else f"{share:.1%}")
                     + f" of the night's rig time (budget "
                     f"{number_at(result, 'budget_fraction'):.0%})"))
    checks = [m for m in run.estimated if m.label == "hold"]
    if checks:
        last = checks[-1]
        rows.append(("last check", f"{last.value('inversion'):.3f} "
                     f"[{last.value('inversion_low'):.3f}, {last.value('inversion_high'):.3f}]"
                     f" ({level_label(run.confidence)} interval; check {last.point} at "
                     f"{format_setpoints(last.setpoints)}, phase shift "
                     f"{last.value('phase_shift') / math.pi:.3f} pi)"))
        low = min(checks, key=lambda m: m.value("inversion"))
        rows.append(("lowest check", f"{low.value('inversion'):.3f} "
                     f"[{low.value('inversion_low'):.3f}, {low.value('inversion_high'):.3f}] "
                     f"(check {low.point})"))
    else:
        rows.append(("last check", "none yet"))
    rows.append(("effort", f"{len(run.estimated)} measurements, "
                 f"{int(number_at(result, 'shots', default=run.shots)):,} shots, beam time "
                 f"{measured_duration_text(number_at(result, 'rig_time_s', default=run.rig_time_s))}"))
    return rows


def header_rows(run: Run) -> list[tuple[str, str]]:
    """The run's header as (name, text) rows, for the text summary and the page."""
    if run.command == "track":
        return _night_header(run)
    result = run.result or {}
    rows = [("rig", run.rig), ("command", run.command),
            ("started", str(run.manifest.get("started", "?"))), ("status", run.status)]
    final = run.final_measurement()
    level = level_label(run.confidence)
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
                     f"at {best.name} ({format_setpoints(best.setpoints)})"))
    chosen = run.chosen
    rows.append(("chosen set-points", format_setpoints(chosen) +
                 ("" if chosen is None or run.chosen_is_verified
                  else " (not yet verified)")))
    if final is not None:
        shift, stderr = final.value("phase_shift"), final.value("phase_shift_stderr")
        rows.append(("phase shift", f"{shift / math.pi:.3f} pi +- {stderr / math.pi:.3f} pi; "
                     f"absorption {final.value('absorption'):.3f}; contrasts "
                     f"{final.value('contrast_empty'):.3f} (empty), "
                     f"{final.value('contrast_one_photon'):.3f} (one photon)"))
    points = int(number_at(result, "points",
                           default=sum(m.label in SEARCH_LABELS for m in run.estimated)))
    shots = int(number_at(result, "shots", default=run.shots))
    rig_time = number_at(result, "rig_time_s", default=run.rig_time_s)
    if math.isfinite(number_at(result, "wall_time_s")):
        wall = measured_duration_text(number_at(result, "wall_time_s"))
    else:
        first = parse_time(run.records[0].get("t_wall")) if run.records else None
        last = parse_time(run.records[-1].get("t_wall")) if run.records else None
        wall = (measured_duration_text((last - first).total_seconds()) + " so far"
                if first is not None and last is not None else "unknown")
    rows.append(("effort", f"{points} search points, {len(run.estimated)} measurements, "
                 f"{shots:,} shots, rig time {measured_duration_text(rig_time)}, wall time {wall}"))
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
                         f"at {format_setpoints(read_setpoints(truth['best_setpoints']))}; "
                         f"ratio {at / best_true:.3f}"))
        except (KeyError, TypeError, ValueError, ZeroDivisionError):
            rows.append(("truth (simulated)", "unreadable truth block"))
    return rows


def _best(done: Sequence[Measurement]) -> Measurement | None:
    finite = [m for m in done if math.isfinite(m.value("inversion"))]
    return max(finite, key=lambda m: m.value("inversion")) if finite else None



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
                 for f in FIELDS))
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
            f"{int(number_at(result, 'shots', default=run.shots)):>9,} "
            f"{measured_duration_text(number_at(result, 'rig_time_s', default=run.rig_time_s)):>10} "
            f"{ratio:>6}")


def format_text(report: Report) -> str:
    """The short text summary: the notices (a run still going, a damaged journal) as ``NOTE:``
    lines, the flags, then each run's header and measurements.

    A folder of more than three runs gets one line per run instead of a section each.
    """
    lines = [f"NOTE: {notice.text}" for notice in report.notices]
    lines.append(f"autotune report of {report.path}")
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
            notes = page_notes(run)
            lines += [f"  note: {n}" for n in notes]
    return "\n".join(lines)


def page_notes(run: Run) -> list[str]:
    """The notes under a run's section of the page and the terminal summary: the journal
    record types this report does not draw, with their counts.

    Parameters
    ----------
    run : Run

    Returns
    -------
    list of str
        One line a note (empty when there is nothing to say).
    """
    notes = []
    if run.unknown:
        kinds = ", ".join(f"{k} ({n})" for k, n in sorted(run.unknown.items()))
        notes.append(f"journal record types not drawn by this report: {kinds}")
    return notes


