"""The night study (section 6): a held night against today's fixed retune schedules, its
jobs, summary and targets."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any


from autotune.config import (
    RunConfig,
)
from autotune.bench.jobs import config_spec
from autotune.bench.night_rig import night_steps
from autotune.bench.plan import NIGHT_SCHEDULES_S, StudyPlan, THERMAL_STEP_HZ, family_seed
from autotune.bench.scenarios import FAMILIES, make_scenarios
from autotune.bench.summaries import quantiles, target_row, true_best_below
from autotune.bench.tables import night_label, number_text


# --------------------------------------------------------------------------------------------
# The night study (section 6)
# --------------------------------------------------------------------------------------------


def night_labels() -> list[str]:
    """The methods of the night study, in the order of its table."""
    return ["track", *[f"schedule {s / 60:g} min" for s in NIGHT_SCHEDULES_S], "track (quiet)"]


def night_jobs(plan: StudyPlan, base: RunConfig, rig: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Per scenario of each night family: ``track``, today's schedules, a quiet ``track``."""
    spec = config_spec(base)
    jobs: list[dict[str, Any]] = []
    for family in plan.night_families:
        for scenario in make_scenarios(plan.night_scenarios, family_seed(plan, family),
                                       FAMILIES[family]):
            common = {"kind": "hold_night", "config": spec, "scenario": scenario, "rig": rig,
                      "hours": plan.night_hours, "steps": night_steps(scenario, plan.night_hours)}
            jobs.append({**common, "method": "track", "quiet": False})
            for interval in NIGHT_SCHEDULES_S if plan.night_schedules else ():
                jobs.append({**common, "method": "schedule", "interval_s": interval,
                             "quiet": False})
            jobs.append({**common, "method": "track", "quiet": True})
    return jobs


def summarise_night(runs: Sequence[Mapping[str, Any]], plan: StudyPlan,
                     budget_fraction: float) -> dict[str, Any]:
    """Figures of every method of the night study, per family: the distribution (quartiles,
    least and most), the worst night, and the nights over ``budget_fraction``."""
    out: dict[str, Any] = {}
    for family in plan.night_families:
        mine = [r for r in runs if r["family"] == family]
        out[family] = {}
        for label in night_labels():
            rows = [r for r in mine if night_label(r) == label]
            done = [r for r in rows if "skipped" not in r]
            delays = [d for r in done for d in r["recovery_s"]]
            detections = [d for r in done for d in r.get("detection_s") or []]
            hours = sum(r["night_rig_time_s"] for r in done) / 3600.0
            alarms = [r.get("alarms") for r in done if r.get("alarms") is not None]
            worst = min(done, key=lambda r: r["fraction_097"], default=None)
            finite = [d for d in delays if d is not None]
            out[family][label] = {
                "nights": len(done), "skipped": len(rows) - len(done),
                # Nights not run on rigs whose true best lies below [acceptance]
                # min_inversion (a rig fact: no setting the tool may vouch for).
                "below_min_inversion": sum(_below_min_inversion(r) for r in rows
                                           if "skipped" in r),
                "fraction_097_q": quantiles([r["fraction_097"] for r in done]),
                "fraction_097_all": sorted(r["fraction_097"] for r in done),
                "fraction_098_q": quantiles([r["fraction_098"] for r in done]),
                "below_095": sum(r["fraction_097"] < 0.95 for r in done),
                "holding_share_q": quantiles([r["holding_share"] for r in done]),
                "holding_share_max": max((r["holding_share"] for r in done), default=math.nan),
                "over_budget": sum(r["holding_share"] > budget_fraction + 1e-9 for r in done),
                "budget_unheld_s_q": quantiles([r.get("budget_unheld_s") or 0.0 for r in done]),
                "retunes_q": quantiles([r["retunes"] for r in done]),
                "calibrations_total": sum(int(r["calibrations"] or 0) for r in done),
                "alarms_per_8h_q": quantiles([a * 8.0 / plan.night_hours for a in alarms]),
                "alarms_per_8h_max": max((a * 8.0 / plan.night_hours for a in alarms),
                                         default=math.nan),
                "alarms_total": sum(alarms), "rig_hours": hours,
                "recovery_s_q": quantiles(delays), "steps": len(delays),
                "recovery_s_max": math.inf if any(d is None for d in delays) else
                max(finite, default=math.nan),
                "never_recovered": sum(d is None for d in delays),
                "detection_s_q": quantiles(detections),
                # Nights whose outlook warned before the first check (the time to confirm a
                # step over hold_outlook.CONFIRM_WITHIN_S): scenario, minutes, the warning.
                "warned": [{"scenario": r["scenario"],
                            "confirm_s": r["step_outlook"].get("confirm_s"),
                            "warning": r["step_outlook"]["warning"]}
                           for r in done if (r.get("step_outlook") or {}).get("warning")],
                # Nights whose last outlook, told at a later plan, warned: the checks slowed
                # past the line after the first check (a retune ate into the budget).
                "warned_later": [{"scenario": r["scenario"],
                                  "confirm_s": r["last_step_outlook"].get("confirm_s"),
                                  "warning": r["last_step_outlook"]["warning"]}
                                 for r in done if (r.get("last_step_outlook") or {}).get("later")
                                 and r["last_step_outlook"].get("warning")],
                "worst": None if worst is None else {
                    "scenario": worst["scenario"], "fraction_097": worst["fraction_097"],
                    "fraction_098": worst["fraction_098"],
                    "holding_share": worst["holding_share"], "retunes": worst["retunes"],
                    "alarms": worst.get("alarms"), "recovery_s": worst["recovery_s"],
                    "ratio_min": worst["ratio_min"],
                    "budget_unheld_s": worst.get("budget_unheld_s")},
            }
    return out


def _below_min_inversion(run: Mapping[str, Any]) -> bool:
    """Whether a night's rig cannot reach ``[acceptance] min_inversion`` at its true best
    (:func:`~autotune.bench.summaries.true_best_below`)."""
    calibration = run.get("calibration") or {}
    return true_best_below(calibration.get("final_true_best"), calibration.get("min_inversion"))


def _not_applicable(row: dict[str, Any], track: Mapping[str, Any]) -> dict[str, Any]:
    """``row`` of a family with no track night because no drawn rig reaches ``min_inversion``
    at its true best: "not applicable", saying so with the counts; else ``row``."""
    drawn = track["nights"] + track["skipped"]
    below = track.get("below_min_inversion", 0)
    if track["nights"] or not drawn or below != drawn:
        return row
    return {**row, "met": None, "status": "not applicable",
            "measured": f"not applicable: no drawn rig reaches min_inversion at its true best "
                        f"({below} of {drawn} track nights' rigs below it)"}


def night_targets(summary: Mapping[str, Any], plan: StudyPlan,
                   budget_fraction: float) -> list[dict[str, Any]]:
    """The issue-22 targets, per family of the night study: every night, not the median."""
    out = []
    schedules = [label for label in night_labels() if label.startswith("schedule")]
    for family in plan.night_families:
        rows = summary[family]
        t, quiet = rows["track"], rows["track (quiet)"]
        least = min(t["fraction_097_all"], default=math.nan)
        out.append(_not_applicable(target_row(
            f"track [{family}]: every night held",
            ">= 95% of the night at >= 0.97 of the moving best (lower end of each interval), "
            "in the worst night",
            f"worst {number_text(least, 3)}, median {number_text(t['fraction_097_q'][1], 3)} "
            f"({t['below_095']} of {t['nights']} nights below 95%)",
            bool(t["nights"]) and least >= 0.95), t))
        out.append(_not_applicable(target_row(
            f"track [{family}]: beam within the budget",
            f"no night above budget_fraction ({budget_fraction:.0%}) on holding",
            f"{t['over_budget']} of {t['nights']} nights over, most "
            f"{number_text(t['holding_share_max'] * 100, 2)}%, median "
            f"{number_text(t['holding_share_q'][1] * 100, 2)}%",
            bool(t["nights"]) and t["over_budget"] == 0), t))
        recovery, most = t["recovery_s_q"][1], t["recovery_s_max"]
        out.append(_not_applicable(target_row(
            f"track [{family}]: recovery from a {THERMAL_STEP_HZ / 1e3:g} kHz step",
            "within 5 min of rig time in the median, 15 min in the worst night",
            f"{number_text(recovery / 60, 1)} min median, {number_text(most / 60, 1)} min worst over "
            f"{t['steps']} steps ({t['never_recovered']} never recovered)",
            bool(t["steps"]) and recovery <= 300.0 and most <= 900.0), t))
        false = quiet["alarms_per_8h_max"]
        out.append(target_row(
            f"track [{family}]: quiet night (no steps, no ramp)",
            "at most one false retune per 8 h in any night",
            f"{number_text(false, 2)} per 8 h in the worst night ({quiet['alarms_total']} alarms in "
            f"{quiet['rig_hours']:.0f} h)", bool(quiet["nights"]) and false <= 1.0))
        if not all(rows[label]["nights"] for label in schedules):
            continue
        better = []
        for key in ("fraction_097_q", "fraction_098_q"):
            mine = t[key][1]
            theirs = [rows[label][key][1] for label in schedules]
            better.append(all(mine >= other for other in theirs) and
                          any(mine > other for other in theirs))
        out.append(target_row(
            f"track [{family}]: against today's schedules in this run",
            "better than both on the fractions at >= 0.97 and >= 0.98 (medians)",
            "; ".join(f"{label}: {number_text(rows[label]['fraction_097_q'][1], 3)} / "
                      f"{number_text(rows[label]['fraction_098_q'][1], 3)}"
                      for label in ["track", *schedules]),
            all(better)))
    return out
