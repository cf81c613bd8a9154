"""Figure: a night of ``autotune track`` told by its own test, against rig time.

A night (:mod:`autotune.run.track`) decides by what its ``hold`` records journal after every check:
the phase error against the stored phase at the peak, the lock's estimate of the peak, the
three sequential statistics against their thresholds (:mod:`autotune.analysis.hold`), the inversion
against its reference, and the beam time holding took against the budget. This figure draws
exactly those numbers, with the night's retunes and calibrations (shaded from their start to
their end, red when not accepted), its alarms and its failed recoveries.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from autotune.report.figures.base import errorbar, new_figure, set_title
from autotune.analysis.lock_fit import wrap_phase
from autotune.report.model import Run, level_label, number_at
from autotune.run.records import Acquisition, Decision, Hold, Wait, parse

_STAGES = ("retune", "calibrate")


def _get(mapping: Any, *keys: str) -> Any:
    for key in keys:
        if not isinstance(mapping, Mapping):
            return None
        mapping = mapping.get(key)
    return mapping


def night_records(run: Run) -> dict[str, Any]:
    """The night's numbers, each against its rig clock (s): checks, stages, alarms, failures,
    corrections, moves, plans and the beam time of every acquisition."""
    holds, stages, alarms, failures, corrections, plans, beam = [], [], [], [], [], [], []
    clock = run.clock_start
    open_stage: dict[str, Any] | None = None
    for raw in run.records:
        rec = parse(raw)
        if isinstance(rec.get("clock"), (int, float)):
            clock = float(rec.get("clock"))
        if isinstance(rec, Acquisition):
            beam.append((rec.t_start, rec.t_end))
            clock = rec.t_end
        elif isinstance(rec, Hold):
            holds.append(raw)
        elif isinstance(rec, Wait):
            # What follows a wait happens when it ends.
            clock = rec.until_clock
        elif isinstance(rec, Decision):
            what = rec.what
            if what in _STAGES:
                open_stage = {"kind": what, "index": rec.get("index"), "start": clock,
                              "end": None, "status": None}
                stages.append(open_stage)
            elif what == "stage_done" and open_stage is not None:
                open_stage["end"] = clock
                reason = rec.reason
                status = _get(raw, "outcome", "status")
                open_stage["status"] = str(status) if status else (
                    "accepted" if ": accepted" in reason or "still_good" in reason else reason)
                open_stage = None
            elif what == "alarm":
                alarms.append({**raw, "clock": clock})
            elif what == "failure":
                failures.append({**raw, "clock": clock})
            elif what == "correct" and isinstance(rec.get("to"), Mapping):
                corrections.append({**raw, "clock": clock})
            elif what == "plan":
                plans.append({**raw, "clock": clock})
    if open_stage is not None:
        open_stage["end"] = clock
    return {"holds": holds, "stages": stages, "alarms": alarms, "failures": failures,
            "corrections": corrections, "plans": plans, "beam": beam}


def _peak_variance(hold: Mapping[str, Any]) -> float:
    """The variance of the lock's peak after a check (Hz^2): its covariance's first element."""
    cov = _get(hold, "numbers", "lock", "covariance")
    try:
        return number_at(cov[0][0])
    except (TypeError, IndexError, KeyError):
        return math.nan


def _budget(run: Run) -> float:
    value = number_at(run.result, "budget_fraction")
    if not math.isfinite(value):
        value = number_at(run.manifest, "config", "track", "budget_fraction")
    return value


def _floor(run: Run, plans: list[dict[str, Any]]) -> float:
    for plan in reversed(plans):
        value = number_at(plan, "plan", "inputs", "floor")
        if math.isfinite(value):
            return value
    return number_at(run.manifest, "config", "track", "floor")


def figure_night(run: Run) -> tuple[Any, str] | None:
    """Figure: a night against rig time, in five panels sharing the time axis.

    1. the inversion of every check with its interval, the reference the inversion watch
       compares with and the floor (``[track] floor`` times the reference);
    2. the phase error of every check (its phase shift minus the stored phase at the peak);
    3. the detuning set-point held, the lock's estimate of the peak (one standard error) and
       each correction;
    4. the three sequential statistics (S+, S- of the lock's innovations, S of the inversion)
       with their thresholds, alarms marked;
    5. the share of the night's rig time holding took (checks, retunes, calibrations) against
       the budget.

    Retunes and calibrations are shaded over every panel (green accepted, red not), alarms are
    red vertical lines, failed recoveries red crosses. Returns ``(figure, caption)``, or None
    for a run that is not a night.
    """
    if run.command != "track":
        return None
    night = night_records(run)
    origin = run.clock_start if run.clock_start is not None else 0.0

    def hours(clock: Any) -> float:
        value = number_at(clock)
        return (value - origin) / 3600.0 if math.isfinite(value) else math.nan

    fig = new_figure(9.0, 10.5)
    axes = fig.subplots(5, 1, sharex=True, height_ratios=[3, 2, 2.4, 2.4, 1.6])
    ax_inv, ax_phase, ax_det, ax_stat, ax_share = axes
    level = level_label(run.confidence)
    checks = {m.point: m for m in run.estimated if m.label == "hold"}
    holds = [h for h in night["holds"] if h.get("point") in checks]

    # 1. inversion, reference, floor
    t = np.array([hours(checks[h["point"]].clock_s) for h in holds])
    inv = np.array([checks[h["point"]].value("inversion") for h in holds])
    lo = np.array([checks[h["point"]].value("inversion_low") for h in holds])
    hi = np.array([checks[h["point"]].value("inversion_high") for h in holds])
    if len(holds):
        err = np.vstack([np.where(np.isfinite(lo), inv - lo, 0.0), np.where(np.isfinite(hi), hi - inv, 0.0)])
        errorbar(ax_inv, t, inv, yerr=np.clip(err, 0.0, None), fmt="s", ms=4, capsize=2, lw=0.8,
                  color="tab:blue", label=f"checks ({len(holds)}), {level} interval",
                  gid="night-checks")
    others = [m for m in run.estimated if m.label != "hold" and math.isfinite(m.value("inversion"))]
    if others:
        ax_inv.plot([hours(m.clock_s) for m in others], [m.value("inversion") for m in others],
                    ".", color="0.6", ms=4, label=f"retune / calibration points ({len(others)})",
                    gid="night-stage-points")
    reference = []
    for h in holds:
        ref = _get(h, "state", "reference")
        weight, weighted = number_at(ref, "weight"), number_at(ref, "weighted")
        reference.append(weighted / weight if weight > 0 else math.nan)
    floor = _floor(run, night["plans"])
    if reference:
        ref = np.array(reference)
        ax_inv.step(t, ref, where="post", color="black", lw=1.2, label="reference", gid="reference")
        if math.isfinite(floor):
            ax_inv.step(t, floor * ref, where="post", color="black", lw=1.0, ls="--",
                        label=f"floor ({floor:g} of the reference)", gid="floor")
    ax_inv.set_ylabel("inversion (dimensionless)")
    ax_inv.legend(fontsize=7, loc="lower left", ncol=2)

    # 2. phase error
    perr, perr_sd = [], []
    for h in holds:
        m = checks[h["point"]]
        star = number_at(h, "state", "prior", "phase_at_peak_rad")
        perr.append(float(wrap_phase(m.value("phase_shift") - star)) / math.pi if math.isfinite(star) else math.nan)
        perr_sd.append(m.value("phase_shift_stderr") / math.pi)
    if holds:
        errorbar(ax_phase, t, np.array(perr), yerr=np.nan_to_num(np.array(perr_sd)), fmt="o",
                  ms=4, capsize=2, lw=0.8, color="tab:purple", gid="phase-error",
                  label="phase shift − phase at the peak")
        ax_phase.legend(fontsize=7, loc="best")
    else:
        ax_phase.text(0.5, 0.5, "no check", transform=ax_phase.transAxes, ha="center",
                      va="center", fontsize=8, color="0.4")
    ax_phase.axhline(0.0, color="black", lw=0.6)
    ax_phase.set_ylabel("phase error (π rad)")

    # 3. detuning held, lock's peak, corrections
    steps = sorted((hours(mv["clock"]), mv["setpoints"]["detuning"] / 1e3) for mv in run.moves
                   if "detuning" in mv["setpoints"] and math.isfinite(hours(mv["clock"])))
    if steps:
        ax_det.step([s[0] for s in steps], [s[1] for s in steps], where="post", color="0.3", lw=1.1,
                    label="detuning set-point applied", gid="held")
    peak = [(number_at(h, "numbers", "lock", "peak_hz"), _peak_variance(h)) for h in holds]
    if peak:
        p = np.array([x[0] for x in peak]) / 1e3
        sd = np.sqrt(np.clip(np.array([x[1] for x in peak]), 0.0, None)) / 1e3
        ax_det.errorbar(t, p, yerr=np.nan_to_num(sd), fmt="^", ms=4, capsize=2, lw=0.8,
                        color="tab:green", label="lock's estimate of the peak")
        ax_det.lines[-1].set_gid("lock-peak")
    corr = night["corrections"]
    if corr:
        ct = np.array([hours(c["clock"]) for c in corr])
        to = np.array([number_at(c, "to", "detuning") for c in corr]) / 1e3
        fr = np.array([number_at(c, "from", "detuning") for c in corr]) / 1e3
        ax_det.vlines(ct, fr, to, color="tab:orange", lw=1.5)
        ax_det.plot(ct, to, "o", color="tab:orange", ms=4, label=f"corrections ({len(corr)})",
                    gid="corrections")
    ax_det.set_ylabel("detuning (kHz)")
    ax_det.legend(fontsize=7, loc="best")

    # 4. sequential statistics and thresholds
    for key, name, colour in (("upper", "S+ (peak moved up)", "tab:red"),
                              ("lower", "S− (peak moved down)", "tab:blue"),
                              ("inversion", "S of the inversion's drop", "tab:olive")):
        values = np.array([number_at(h, "numbers", key) for h in holds])
        if len(values):
            ax_stat.plot(t, values, "o-", ms=3, lw=1.0, color=colour, label=name, gid=f"stat-{key}")
    thresholds = np.array([number_at(h, "state", "plan", "test", "threshold") for h in holds])
    inv_thresholds = np.array([number_at(h, "state", "plan", "test", "inversion_threshold")
                               for h in holds])
    if len(holds):
        ax_stat.step(t, thresholds, where="post", color="black", lw=1.2, gid="threshold",
                     label="threshold h of S+ and S−")
        ax_stat.step(t, inv_thresholds, where="post", color="tab:olive", lw=1.0, ls="--",
                     gid="inversion-threshold", label="threshold of S")
    for a in night["alarms"]:
        value = number_at(a, "value")
        if math.isfinite(value):
            ax_stat.plot(hours(a["clock"]), value, "X", ms=11, color="red", mec="black",
                         zorder=5, gid="alarm-marker")
            ax_stat.annotate(f"alarm: {a.get('statistic')} {value:.2f} > {number_at(a, 'threshold'):.2f}",
                             (hours(a["clock"]), value), xytext=(6, 4), textcoords="offset points",
                             fontsize=7, color="red")
    ax_stat.set_ylabel("statistic (standard units)")
    if holds:
        ax_stat.legend(fontsize=7, loc="upper left", ncol=2)
    else:
        ax_stat.text(0.5, 0.5, "no check: the night never held", transform=ax_stat.transAxes,
                     ha="center", va="center", fontsize=8, color="0.4")

    # 5. beam share against the budget
    final_share = math.nan
    if night["beam"]:
        beam = np.array(sorted(night["beam"]))
        ends = beam[:, 1]
        used = np.cumsum(beam[:, 1] - beam[:, 0])
        elapsed = ends - origin
        keep = elapsed > 0
        share = 100.0 * used[keep] / elapsed[keep]
        final_share = float(share[-1]) if len(share) else math.nan
        ax_share.plot((ends[keep] - origin) / 3600.0, share, "-",
                      color="tab:blue", lw=1.2, label="beam time holding took so far",
                      gid="beam-share")
    budget = _budget(run)
    if math.isfinite(budget):
        ax_share.axhline(100.0 * budget, color="red", lw=1.0, ls="--", gid="budget",
                         label=f"budget {budget:.0%}")
    plans = [(hours(p["clock"]), number_at(p, "plan", "check_share")) for p in night["plans"]]
    if plans:
        ax_share.plot([p[0] for p in plans], [100.0 * p[1] for p in plans], "v", color="tab:green",
                      ms=5, label="planned share of the checks", gid="planned-share")
    ax_share.set_ylabel("beam share (%)")
    ax_share.set_xlabel("rig time since the night began (h)")
    ax_share.legend(fontsize=7, loc="upper right")
    if math.isfinite(budget):
        # The start of a night is all retune (100 %): the scale is the budget's, unless the
        # night ended far above it.
        top = 400.0 * budget
        if math.isfinite(final_share):
            top = max(top, 1.15 * final_share)
        ax_share.set_ylim(0.0, min(100.0, top))

    # Stages, alarms and failures over every panel.
    for stage in night["stages"]:
        start, end = hours(stage["start"]), hours(stage["end"])
        if not (math.isfinite(start) and math.isfinite(end)):
            continue
        good = stage["status"] in ("accepted", "still_good")
        for ax in axes:
            ax.axvspan(start, max(end, start + 1e-3), color="tab:green" if good else "tab:red",
                       alpha=0.12, lw=0, zorder=0)
        ax_inv.annotate(f"{stage['kind']} {stage['index']}: {stage['status']}", (start, 1.0),
                        xycoords=("data", "axes fraction"), xytext=(2, -2),
                        textcoords="offset points", fontsize=7, va="top", rotation=90,
                        color="darkgreen" if good else "darkred")
    for a in night["alarms"]:
        for ax in axes:
            ax.axvline(hours(a["clock"]), color="red", lw=1.0, zorder=1)
    for f in night["failures"]:
        ax_inv.plot(hours(f["clock"]), 0.02, "x", transform=ax_inv.get_xaxis_transform(), ms=10,
                    mew=2, color="red", gid="failure")
    for ax in axes:
        ax.grid(alpha=0.3)
    set_title(fig, run, "the night, told by its checks and its test")
    counts = ", ".join(f"{n} {one if n == 1 else many}" for n, one, many in (
        (len(holds), "check", "checks"), (len(corr), "correction", "corrections"),
        (len(night["alarms"]), "alarm", "alarms"),
        (len(night["stages"]), "retune or calibration", "retunes or calibrations"),
        (len(night["failures"]), "failed recovery", "failed recoveries")))
    caption = (f"The night against rig time ({counts}). (1) Each check's inversion with its "
               f"{level} interval, the reference the inversion watch compares with (the "
               "precision-weighted mean of the last stage and the checks since) and the floor "
               f"({floor:g} of the reference); grey: points of the retunes and calibrations. "
               "(2) Each check's phase error: its photon phase shift minus the stored phase at "
               "the peak, one standard error; the lock reads the detuning error from it "
               "(docs/physics.md §5b). (3) The detuning set-point applied, the lock's estimate of the "
               "peak (Kalman filter, one standard error) and each correction (from → to). "
               "(4) The sequential statistics after each check (two-sided CUSUM of the lock's "
               "standardised innovations, one-sided CUSUM of the inversion's drop) against their "
               "thresholds; an X marks an alarm. (5) The share of the night's rig time holding "
               "took so far against the budget, and the share each plan gave the checks. Shaded: "
               "retunes and calibrations (green accepted, red not); red lines: alarms; red "
               "crosses: failed recoveries.")
    return fig, caption
