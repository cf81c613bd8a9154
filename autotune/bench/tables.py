"""The study's tables as printed (and as the README shows them)."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any


from autotune.bench.plan import GUIDED, LOWER_THRESHOLD, THERMAL_STEP_HZ, THRESHOLD
from autotune.errors import ValueRefused


# --------------------------------------------------------------------------------------------
# Table
# --------------------------------------------------------------------------------------------


def number_text(value: float | None, digits: int = 0, scale: float = 1.0) -> str:
    """``value / scale`` to ``digits``, "n/a" for None or NaN, "never" for an infinity (results
    read back by :func:`~autotune.bench.jobs.from_json` hold floats)."""
    if value is None or math.isnan(value):
        return "n/a"
    if math.isinf(value):
        return "never"
    return f"{value / scale:,.{digits}f}"


def _minutes_text(seconds: float) -> str:
    """A recovery in minutes to 0.1, or "never" (an infinite recovery)."""
    text = number_text(seconds / 60, 1)
    return text if text == "never" else f"{text} min"


def _q(values: Sequence[float], digits: int = 0, scale: float = 1.0) -> str:
    return f"{number_text(values[1], digits, scale)} [{number_text(values[0], digits, scale)}-" \
           f"{number_text(values[2], digits, scale)}]"


def _ranges_text(ranges: Mapping[str, Sequence[float]]) -> str:
    return ", ".join(f"{k} [{lo:g}, {hi:g}]" for k, (lo, hi) in ranges.items())


def _format_night(night: Mapping[str, Any]) -> list[str]:
    """Section 6: the night study."""
    lines = [f"6. the night: {night['hours']:g} h of rig time per night after a calibration, the "
             f"scenario's ramp and random walk, {night['thermal_steps']} thermal steps of "
             f"{night['thermal_step_hz'] / 1e3:g} kHz (random times and signs, at least an hour "
             f"before the end); track against today's retune every "
             f"{' and '.join(f'{s / 60:g}' for s in night['schedules_s'])} min; a quiet night "
             f"(no steps, no ramp) for track's false retunes. The truth at the set-points in "
             f"force, sampled every {night['grid_s']:g} s of rig time and before and after every "
             f"operation, each interval counted at the lower of its two ends, over the moving "
             f"true best; median [quartiles]"]
    header = (f"    {'method':<17} {'nights':>6} {'night at >=0.97':>22} {'night at >=0.98':>22} "
              f"{'<95%':>4} {'beam on holding':>22} {'retunes':>13} {'calib.':>6} "
              f"{'recovery (min)':>20} {'alarm delay (min)':>20} {'false/8h':>8}")
    budget = float((night.get("track") or {}).get("budget_fraction", 0.05))
    for family in night["families"]:
        lines.append(f"  {family} ({night['scenarios']} scenarios)")
        t = night["summary"][family].get("track") or {}
        worst = t.get("worst")
        if worst is not None:
            recovery = ", ".join("never" if d is None else f"{d / 60:.1f}"
                                 for d in worst["recovery_s"])
            lines.append(
                f"    worst track night: scenario {worst['scenario']}, "
                f"{worst['fraction_097']:.3f} of the night at >= 0.97 (lowest ratio "
                f"{worst['ratio_min']:.3f}), {worst['holding_share']:.2%} of the beam on holding, "
                f"{worst['retunes']} retunes, recovery {recovery or '-'} min, "
                f"{(worst.get('budget_unheld_s') or 0.0) / 60:.1f} min not held for the budget")
            lines.append(
                f"    every track night at >= 0.97: "
                f"{', '.join(f'{x:.3f}' for x in t['fraction_097_all'])}; beam on holding at "
                f"most {t['holding_share_max']:.2%}; nights over the {budget:.0%} budget: "
                f"{t['over_budget']} of {t['nights']}; recovery worst "
                f"{_minutes_text(t['recovery_s_max'])}")
        for label, row in night["summary"][family].items():
            for key, when in (("warned", "before the first check"),
                              ("warned_later", "at a later plan")):
                lines.extend(f"    warned {when}: {label}, scenario {warned['scenario']}: "
                             f"{warned['warning']}" for warned in row.get(key) or [])
        lines.extend(nights_not_run(night.get("runs") or [], family))
        lines.append(header)
        for label, row in night["summary"][family].items():
            if not row["nights"]:
                continue
            recovery = row["recovery_s_q"]
            detection = row["detection_s_q"]
            quiet = label == "track (quiet)"
            lines.append(
                f"    {label:<17} {row['nights']:>6} {_q(row['fraction_097_q'], 3):>22} "
                f"{_q(row['fraction_098_q'], 3):>22} {row['below_095']:>4} "
                f"{_q([x * 100 if isinstance(x, float) else x for x in row['holding_share_q']], 1) + ' %':>22} "
                f"{_q(row['retunes_q']):>13} {row['calibrations_total']:>6} "
                f"{'-' if quiet or not row['steps'] else _q([x / 60 if isinstance(x, float) else x for x in recovery], 1):>20} "
                f"{'-' if not label.startswith('track') or quiet or not row['steps'] else _q([x / 60 if isinstance(x, float) else x for x in detection], 1):>20} "
                f"{number_text(row['alarms_per_8h_q'][1], 2) if quiet else '-':>8}")
    return lines


def night_label(run: Mapping[str, Any]) -> str:
    """The night study's name for a night's method: ``track``, ``track (quiet)`` or
    ``schedule N min``."""
    if run["method"] == "track":
        return "track (quiet)" if run["quiet"] else "track"
    return f"schedule {float(run['interval_s']) / 60:g} min"


def nights_not_run(runs: Sequence[Mapping[str, Any]], family: str) -> list[str]:
    """One line per night of ``family`` that never started, with its calibration's figures and
    the one-line reason the calibration gave (records before that field say only the status)."""
    lines = []
    for run in runs:
        if run.get("family") != family or "skipped" not in run:
            continue
        cal = run.get("calibration") or {}
        figures = ", ".join(text for text in (
            f"verified {cal['inversion']:.3f}" if cal.get("inversion") is not None else "",
            f"true best {cal['final_true_best']:.3f}" if cal.get("final_true_best") is not None
            else "",
            f"{cal['final_ratio']:.3f} of it" if cal.get("final_ratio") is not None else "",
        ) if text)
        lines.append(f"    not run: scenario {run['scenario']} {night_label(run)}: {run['skipped']} "
                     f"({cal.get('status', '?')}; {figures})"
                     + (f": {cal['reason']}" if cal.get("reason") else ""))
    return lines


def _format_night_only(study: Mapping[str, Any]) -> str:
    lines = [f"autotune benchmark (the night study alone, {study['mode']} mode, SIMULATED rig, "
             f"wall {study['wall_time_s']:.0f} s, {study['machine']['ran_on']})",
             "command: " + study["command"]]
    code = study.get("code") or {}
    lines.append(f"code: commit {str(code.get('commit'))[:10]}" + (
        ", with uncommitted changes to " + ", ".join(code["modified_files"])
        if code.get("modified_files") else ""))
    lines.append("scenario families (seeded draws, never hand-picked; never used to tune track):")
    for name, f in study["families"].items():
        lines.append(f"  {name:<9} seed {f['seed']}: {f['summary']}; ranges "
                     + _ranges_text(f["ranges"]))
    lines.append("")
    lines += _format_night(study["night_study"])
    lines.append("")
    lines.append("targets (from this one run):")
    for t in study["targets"]:
        lines.append(f"  [{t['status']}] {t['name']}: target {t['target']}; measured "
                     f"{t['measured']}")
    return "\n".join(lines)


def format_table(study: Mapping[str, Any]) -> str:
    """The printed report of a study result (as returned by :func:`run_study`)."""
    if study.get("calibration_study") is False:
        return _format_night_only(study)
    if "families" not in study:
        # Studies stored before the scenario families (one draw, 2026-11) are not read by
        # this version: none is kept in benchmarks/results, and their table had no test.
        raise ValueRefused("this study was stored before the scenario families (no 'families' "
                           "key) and is not shown by this version; run the study again")
    lines = []
    plan = study["plan"]
    n = plan["scenarios"]
    families = plan["families"]
    lines.append(f"autotune benchmark ({study['mode']} mode, SIMULATED rig, {n} scenarios in each "
                 f"of {len(families)} families, wall {study['wall_time_s']:.0f} s, "
                 f"{study['machine']['ran_on']})")
    lines.append("command: " + study["command"])
    code = study.get("code") or {}
    lines.append(f"code: commit {str(code.get('commit'))[:10]}" + (
        ", with uncommitted changes to " + ", ".join(code["modified_files"])
        if code.get("modified_files") else ""))
    rederived = study.get("targets_rederived")
    if rederived:
        lines.append(f"targets and summaries re-derived from the stored runs (unchanged) by the "
                     f"rules of commit {str(rederived.get('commit'))[:10]}: "
                     f"{rederived.get('why', '')}")
    lines.append("scenario families (seeded draws, never hand-picked):")
    main_ranges = study["scenario_ranges"]
    for name in families:
        f = study["families"][name]
        if f["ranges"] == main_ranges and not f["profiles"]:
            ranges = ("uniform over " + _ranges_text(f["ranges"]) if name == "main" else
                      "uniform over the main ranges")
        else:
            extra = {k: v for k, v in f["ranges"].items() if main_ranges.get(k) != v}
            ranges = "uniform over the main ranges, but " + _ranges_text(extra)
        if f["profiles"]:
            ranges += "; cavity.mode_profile " + " or ".join(
                f"{p} ({v['key']} [{v['range'][0]:g}, {v['range'][1]:g}])"
                for p, v in f["profiles"].items()) + ", equally likely"
        lines.append(f"  {name:<9} seed {f['seed']}: {f['summary']}; {ranges}")
    lines.append("")
    lines.append("strategy settings (same fringe measurement per point for all):")
    for kind, settings in study["strategies"].items():
        lines.append(f"  {kind:<10} " + ", ".join(f"{k}={v}" for k, v in settings.items()))
    lines.append("  (grid, coordinate and random get max_points/max_shots raised to finish "
                 "their design; the other strategies keep the configured budget)")
    o = study["oracle"]
    lines.append("")
    lines.append(f"1. what a user pays: the whole stage (search, final detuning scan, "
                 f"verification) until it ends by its own rule, as a multiple of the oracle "
                 f"floor ({o['shots']:,.0f} shots, verification alone at the true best); the "
                 f"final true ratio (true inversion at the verified set-points / true best); "
                 f"scenarios ending below {THRESHOLD:.2f} and {LOWER_THRESHOLD:.2f}; "
                 f"median [quartiles]. Secondary: shots until the recommendation first "
                 f"reaches {THRESHOLD:.0%} ('never' = a failure counted as infinite)")
    header = (f"    {'strategy':<10} {'whole-stage shots':>31} {'x oracle':>8} "
              f"{'final true ratio':>21} {'<0.98':>5} {'<0.97':>5}   "
              f"{'shots to 98% (secondary)':>30} {'never':>5}")
    for name in families:
        of = o["families"][name]
        lines.append(f"  {name} ({of['scenarios']} scenarios; true best outside the search box "
                     f"at the start: {of['best_outside_box_at_start']})")
        lines.append(header)
        for kind, row in study["summary"][name].items():
            lines.append(
                f"    {kind:<10} {_q(row['stage_shots_q']):>31} "
                f"{number_text(row['stage_shots_over_oracle'], 1):>8} "
                f"{_q(row['final_ratio_q'], 3):>21} {row['below_threshold']:>5} "
                f"{row['below_lower_threshold']:>5}   {_q(row['shots_to_threshold_q']):>30} "
                f"{row['never_reached']:>5}")
    lines += _format_shots_by_purpose(study)
    lines.append("")
    lines.append(f"2. oracle floor: {o['shots']:,.0f} shots; verified stderr median "
                 f"{o['verified_stderr_median']:.4f}; " + "; ".join(
                     f"{name}: final true ratio median {o['families'][name]['final_ratio_median']:.3f}"
                     for name in families))
    lines.append("   strategies' verification stderr (median): " + "; ".join(
        f"{name} " + ", ".join(f"{k} {row['verified_stderr_median']:.4f}"
                               for k, row in study["summary"][name].items())
        for name in families))
    ov = study.get("overhead")
    if ov:
        lines.append("")
        lines.append(f"3. optimiser overhead (Bayesian ask + tell, median of {ov['window']} steps "
                     f"before each checkpoint) vs one step's rig time {ov['step_rig_time_s']:.0f} s "
                     f"({ov['step_shots']} shots at {ov['repetition_rate_hz']:g} shots/s)")
        lines.append("   " + "  ".join(
            f"{r['points']} pts: {r['ask_tell_s'] * 1e3:.0f} ms ({r['fraction_of_step']:.2%})"
            for r in ov["rows"]))
    night = study.get("night")
    if night:
        lines.append("")
        lines.append(f"4. long run ({night['family']} scenario {night['scenario']}): calibration + "
                     f"{night['stages']['retune']} back-to-back retunes "
                     f"({night['stages']['still_good']} still good), {night['steps']} steps, "
                     f"{night['rig_clock_h']:.1f} h of rig clock, {night['thermal_steps']} thermal "
                     f"steps, drift on; true ratio after stages median "
                     f"{night['final_ratio_median']:.3f} (min {night['final_ratio_min']:.3f})")
        cps = night["checkpoints"]
        picks = sorted({0, len(cps) // 4, len(cps) // 2, (3 * len(cps)) // 4, len(cps) - 1})
        lines.append("   " + "  ".join(
            f"step {cps[i]['steps']}: traced {cps[i]['traced_current_mib']:.1f} MiB "
            f"(peak {cps[i]['traced_peak_mib']:.1f}), rss {cps[i]['max_rss_mib']:.0f} MiB"
            for i in picks))
        lines.append(f"   growth after warm-up (step {night['warm_checkpoint']['steps']}): "
                     f"{night['growth_fraction']:+.1%}, {night['slope_kib_per_step']:+.2f} KiB/step")
    retuned = study.get("retune_strategies") or []
    if retuned:
        lines.append("")
        lines.append(f"5. retune after a {THERMAL_STEP_HZ / 1e3:g} kHz thermal step (after each "
                     f"calibration of {', '.join(retuned)}): whole stage (check, search, "
                     f"verification) as a multiple of the oracle floor and of the calibration; "
                     f"'moved, passed' = checks that judged the old set-points still good while "
                     f"their true ratio after the step was below {THRESHOLD:.2f}")
        header = (f"    {'strategy':<10} {'retunes':>7} {'passed':>6} {'moved, passed':>13} "
                  f"{'ratio after step':>21} {'whole-stage shots':>27} {'x oracle':>8} "
                  f"{'x calib.':>8} {'final true ratio':>21} {'<0.98':>5} {'<0.97':>5}")
        for name in families:
            lines.append(f"  {name}")
            lines.append(header)
            for kind, r in study["retune"][name].items():
                lines.append(
                    f"    {kind:<10} {r['runs']:>3} of {r['scenarios']:<2} {r['still_good']:>6} "
                    f"{r['moved_judged_still_good']:>13} {_q(r['ratio_after_step_q'], 3):>21} "
                    f"{_q(r['stage_shots_q']):>27} {number_text(r['stage_shots_over_oracle'], 2):>8} "
                    f"{number_text(r['shots_over_calibration_q'][1], 2):>8} "
                    f"{_q(r['final_ratio_q'], 3):>21} {r['below_threshold']:>5} "
                    f"{r['below_lower_threshold']:>5}")
    lines += _format_confidence(study)
    if study.get("night_study"):
        lines.append("")
        lines += _format_night(study["night_study"])
    lines.append("")
    lines.append(f"targets (ratios from this one run; {GUIDED} is the physics-guided strategy):")
    for t in study["targets"]:
        lines.append(f"  [{t['status']}] {t['name']}: target {t['target']}; measured "
                     f"{t['measured']}")
    return "\n".join(lines)


def _format_confidence(study: Mapping[str, Any]) -> list[str]:
    """Section 6: what the stages claimed against the truth, per family (absent in results
    written before the study kept these figures)."""
    confidence = study.get("confidence")
    if not confidence:
        return []
    lines = ["", "6. earned confidence: over every calibration and retune that ran, how often "
             "the stated upper bound of the predicted shortfall covered the true shortfall "
             "(exact binomial 95% interval), the stages accepted and refused, the lowest "
             "accepted final true ratio and the most expensive calibration (x oracle)"]
    header = (f"    {'strategy':<10} {'stages':>6} {'bound covered':>14} {'interval':>10} "
              f"{'accepted':>8} {'lowest':>6} {'refused':>7} {'no reason':>9} "
              f"{'most shots':>10} {'x oracle':>8} {'rigs < min':>10}")
    for name, rows in confidence.items():
        lines.append(f"  {name}")
        lines.append(header)
        for kind, c in rows.items():
            low, high = c["coverage_interval"]
            covered = f"{c['bound_covered']} of {c['bound_stated']}"
            interval = f"{low:.0%}-{high:.0%}" if c["bound_stated"] else "-"
            lowest = number_text(c["accepted_final_min"], 3) if c["accepted"] else "-"
            lines.append(
                f"    {kind:<10} {c['stages']:>6} {covered:>14} {interval:>10} "
                f"{c['accepted']:>8} {lowest:>6} {c['refused']:>7} "
                f"{c['refused_without_reason']:>9} {number_text(c['calibration_shots_max']):>10} "
                f"{number_text(c['calibration_shots_max_over_oracle'], 2):>8} "
                f"{c['rigs_below_min_inversion']:>10}")
    return lines


#: The purposes of a stage's measurements, in the order a calibration meets them.
PURPOSES_SHOWN = ("search", "lock", "velocity", "relock", "check", "correct", "verify",
                  "verify_second_half")


def shots_by_purpose_rows(study: Mapping[str, Any], stage: str = "calibrate"
                          ) -> dict[str, dict[str, dict[str, float]]]:
    """Family -> strategy -> purpose -> median shots of that purpose over the family's stages
    (0 where a stage had none), from the runs that record ``shots_by_purpose``."""
    out: dict[str, dict[str, dict[str, float]]] = {}
    for run in study.get("runs", []):
        record = run.get(stage) or {}
        if "shots_by_purpose" not in record:
            continue
        out.setdefault(run["family"], {}).setdefault(run["strategy"], {}).setdefault("_runs", [])
        out[run["family"]][run["strategy"]]["_runs"].append(record["shots_by_purpose"])
    for family in out.values():
        for row in family.values():
            runs = row.pop("_runs")
            for purpose in PURPOSES_SHOWN:
                values = sorted(float(r.get(purpose, 0)) for r in runs)
                if any(values):
                    row[purpose] = _median(values)
            row["stages"] = float(len(runs))
    return out


def _median(values: Sequence[float]) -> float:
    n = len(values)
    return values[n // 2] if n % 2 else 0.5 * (values[n // 2 - 1] + values[n // 2])


def _format_shots_by_purpose(study: Mapping[str, Any]) -> list[str]:
    rows = shots_by_purpose_rows(study)
    if not rows:
        return []
    floor = float(study["oracle"]["shots"])
    lines = ["", ("1b. where a calibration's shots went: median shots of each purpose over the "
                  "family's calibrations, as a multiple of the oracle floor (medians do not add "
                  "up to the median stage)")]
    for name in study["plan"]["families"]:
        for kind, row in rows.get(name, {}).items():
            parts = ", ".join(f"{purpose} {row[purpose] / floor:.2f}" for purpose in PURPOSES_SHOWN
                              if purpose in row)
            lines.append(f"  {name} ({kind}, {row['stages']:.0f} calibrations): {parts}")
    return lines
