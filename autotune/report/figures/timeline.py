"""Figure: a folder of runs (or a night) against rig time."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from autotune.report.figures.base import (NAMED_RUNS_MAX, errorbar, marker_of, new_figure,
                                           set_title)
from autotune.report.model import Run, level_label, number_at, parse_time, setpoints_equal


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
    starts = [parse_time(r.records[0].get("t_wall")) for r in runs if r.records]
    origin = min((s for s in starts if s is not None), default=None)
    return False, origin.timestamp() if origin else 0.0, \
        "wall time since the first run started (h)"


def _when(use_clock: bool, origin: float, clock: float | None, t_wall: Any) -> float:
    if use_clock:
        return (clock - origin) / 3600.0 if clock is not None else math.nan
    when = parse_time(t_wall)
    return (when.timestamp() - origin) / 3600.0 if when is not None else math.nan


def _detuning_of(value: Any) -> float:
    """The detuning of journaled set-points (Hz), or a bare number as it is; else NaN."""
    return number_at(value, "detuning") if isinstance(value, Mapping) else number_at(value)


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
    fig = new_figure(9.0, 7.0)
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
        errorbar(ax_inv, t, y, yerr=np.clip(e, 0.0, None), fmt=marker_of(label), ms=4,
                        capsize=2, lw=0.8, label=f"{label} ({len(pick)})", gid=f"inv-{label}")
    if len(runs) > 1:
        for r in runs:
            start = _when(use_clock, origin, r.clock_start,
                          r.records[0].get("t_wall") if r.records else None)
            if not math.isfinite(start):
                continue
            end = _when(use_clock, origin, r.clock_end,
                        r.records[-1].get("t_wall") if r.records else None)
            for ax in (ax_inv, ax_det, ax_cor):
                ax.axvline(start, color="0.7", lw=0.8, ls="--", zorder=0)
                if math.isfinite(end) and end > start and runs.index(r) % 2 == 0:
                    ax.axvspan(start, end, color="0.5", alpha=0.07, lw=0, zorder=0)
            if len(runs) <= NAMED_RUNS_MAX:
                ax_inv.annotate(r.name, (start, 1.0), xycoords=("data", "axes fraction"),
                                xytext=(2, -2), textcoords="offset points", fontsize=7,
                                va="top", color="0.35", rotation=90)
    thermal = []
    for r in runs:
        step = (r.manifest.get("dry_run") or {}).get("thermal_step") \
            if isinstance(r.manifest.get("dry_run"), Mapping) else None
        if isinstance(step, Mapping) and isinstance(step.get("clock"), (int, float)):
            when = _when(use_clock, origin, float(step["clock"]), step.get("t_wall"))
            shift = step.get("shift_hz")
            if math.isfinite(when):
                thermal.append((when, float(shift) if isinstance(shift, (int, float)) else math.nan))
    for k, (when, shift) in enumerate(thermal):
        for ax in (ax_inv, ax_det, ax_cor):
            ax.axvline(when, color="tab:red", lw=1.4, ls="-.", zorder=1, gid="thermal-step",
                       label=(f"thermal step {shift / 1e3:+.1f} kHz (simulated)"
                              if ax is ax_det and k == 0 else None))
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
                not setpoints_equal(check[0].setpoints, chosen):
            size = _detuning_of(chosen) - _detuning_of(check[0].setpoints)
            # When the retune left its check point: its first move after the check (the
            # run's end would draw it long after it happened).
            left = [mv for mv in r.moves if check[0].clock_s is not None
                    and mv["clock"] is not None and mv["clock"] > check[0].clock_s
                    and not setpoints_equal(mv["setpoints"], check[0].setpoints)]
            when = (left[0]["clock"], left[0]["t_wall"]) if left else \
                (r.clock_end, r.records[-1].get("t_wall"))
            retuned.append((_when(use_clock, origin, *when), size))
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
    set_title(fig, None, f"{what}: {runs[0].path.parent.name if len(runs) > 1 else runs[0].name}")
    level = level_label(runs[0].confidence)
    caption = (f"Top: the inversion of every measurement with its {level} interval against "
               f"{'rig' if use_clock else 'wall'} time; middle: the detuning set-point applied "
               "(moves) and measured; bottom: detuning corrections, from 'correct' decisions "
               "(to minus from) and from retunes that left their check point, drawn when the "
               "retune first moved away from it. Dashed lines and shading: where each run "
               "begins and ends"
               + ("; dash-dotted red: the thermal step the dry run applied to the simulated "
                  "cavity." if thermal else ".")
               + ("" if use_clock else " The rig clock restarted between runs, so the axis is "
                  "wall time."))
    return fig, caption


