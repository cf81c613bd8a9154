"""The study's statistics: quantiles, ratios to the oracle floor, the misses a sample size
allows, per strategy and family."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from scipy.stats import binomtest

from autotune.bench.plan import LOWER_THRESHOLD, THERMAL_STEP_HZ, THRESHOLD
from autotune.report.model import number_at

#: No stage may be accepted below this fraction of the true best (issue 18's target).
ACCEPT_FLOOR = 0.95


# --------------------------------------------------------------------------------------------
# Statistics and targets
# --------------------------------------------------------------------------------------------


def quantiles(values: Sequence[float | None], probs: Sequence[float] = (0.25, 0.5, 0.75)
              ) -> list[float]:
    """Linear-interpolation quantiles where ``None`` (a failure) counts as +infinity.

    A quantile that interpolates towards a failure is infinite. Returns NaN for no values.
    """
    if not values:
        return [math.nan for _ in probs]
    finite = [float(v) for v in values if v is not None and math.isfinite(float(v))]
    top = max(finite) if finite else 0.0
    sentinel = 1e300
    filled = np.array([sentinel if v is None or not math.isfinite(float(v)) else float(v)
                       for v in values])
    out = []
    for q in np.quantile(filled, list(probs)):
        out.append(math.inf if q > top else float(q))
    return out


def ratio_of(numerator: float, denominator: float) -> float:
    if math.isnan(numerator) or math.isnan(denominator):
        return math.nan
    if math.isinf(denominator):
        return 0.0 if not math.isinf(numerator) else math.nan
    if denominator == 0:
        return math.inf
    return numerator / denominator


def summarise(rows: Sequence[Mapping[str, Any]], oracle_shots: float) -> dict[str, Any]:
    """Figures of one strategy's stages (calibrations or retunes) in one family."""
    finals = [r["final_ratio"] for r in rows]
    summary = {
        "runs": len(rows),
        "stage_shots_q": quantiles([r["shots"] for r in rows]),
        "final_ratio_q": quantiles(finals),
        "below_threshold": sum(f < THRESHOLD for f in finals),
        "below_lower_threshold": sum(f < LOWER_THRESHOLD for f in finals),
        "final_ratio_min": min(finals) if finals else math.nan,
        "shots_to_threshold_q": quantiles([r["shots_to_threshold"] for r in rows]),
        "rig_time_to_threshold_s_q": quantiles([r["rig_time_to_threshold_s"] for r in rows]),
        "never_reached": sum(not r["reached"] for r in rows),
        "points_q": quantiles([r["points"] for r in rows]),
        "below_acceptance": sum(r["status"] == "below_acceptance" for r in rows),
        "verified_stderr_median": float(np.median([r["verified_stderr"] for r in rows]))
        if rows else math.nan,
    }
    summary["stage_shots_over_oracle"] = ratio_of(summary["stage_shots_q"][1], oracle_shots)
    summary["shots_to_threshold_over_oracle"] = ratio_of(summary["shots_to_threshold_q"][1],
                                                       oracle_shots)
    return summary


def true_best_below(true_best: float | None, min_inversion: float | None) -> bool:
    """Whether a rig cannot show ``[acceptance] min_inversion`` anywhere: its true best
    inversion (the simulator's truth, read by the study only) lies below the bar, so no
    calibration of it may be accepted, and no retune or night can follow. False when either is
    not known (a result file from before the study kept them). The one rule of the study's
    "not applicable": a refusal on a rig that can reach the bar stays a miss."""
    return true_best is not None and min_inversion is not None and \
        math.isfinite(true_best) and true_best < min_inversion


def rig_below_acceptance(record: Mapping[str, Any], min_inversion: float | None) -> bool:
    """:func:`true_best_below` of a calibration-study scenario (its ``calibrate`` record)."""
    return true_best_below(record.get("calibrate", {}).get("final_true_best"), min_inversion)


def summarise_retunes(records: Sequence[Mapping[str, Any]], oracle_shots: float,
                      min_inversion: float | None = None) -> dict[str, Any]:
    """Figures of one strategy's retunes in one family; a retune is skipped when its
    calibration was not accepted, and ``skipped_rig_below_min`` counts those skips on rigs
    whose true best lies below ``min_inversion`` (nothing there could be accepted)."""
    done = [r for r in records if "skipped" not in r["retune"]]
    rows = [r["retune"] for r in done]
    summary = summarise(rows, oracle_shots)
    summary.update({
        "thermal_step_hz": THERMAL_STEP_HZ, "scenarios": len(records),
        "skipped": len(records) - len(done),
        "skipped_rig_below_min": sum(rig_below_acceptance(r, min_inversion)
                                     for r in records if "skipped" in r["retune"]),
        "still_good": sum(r["status"] == "still_good" for r in rows),
        "moved_judged_still_good": sum(bool(r["moved_judged_still_good"]) for r in rows),
        "ratio_after_step_q": quantiles([r["ratio_after_step"] for r in rows]),
        "shots_over_calibration_q": quantiles(
            [r["retune"]["shots"] / r["calibrate"]["shots"] for r in done]),
    })
    return summary


def one_line_reason(stage: Mapping[str, Any]) -> bool:
    """Whether a stage's stated reason is one non-empty line (what a refused stage owes)."""
    reason = stage.get("reason")
    return isinstance(reason, str) and bool(reason.strip()) and "\n" not in reason.strip()


def summarise_confidence(records: Sequence[Mapping[str, Any]], oracle_shots: float,
                         min_inversion: float | None = None, confidence: float = 0.95
                         ) -> dict[str, Any]:
    """What a family's stages claimed against the truth: issue 18's figures.

    Over every calibration and retune that ran (a skipped retune did not), how often the
    stated upper bound of the predicted shortfall covered the true shortfall, with the
    Clopper-Pearson interval of that rate (``scipy.stats.binomtest``); the stages accepted
    below the lower bar; the refused stages and whether each said why in one line; the most
    expensive calibration as a multiple of the oracle floor, and how many rigs could not show
    ``min_inversion`` anywhere.
    """
    stages = [r[kind] for r in records for kind in ("calibrate", "retune")
              if kind in r and "skipped" not in r[kind]]
    stated = [s for s in stages if math.isfinite(number_at(s, "predicted_shortfall_upper"))
              and math.isfinite(number_at(s, "true_shortfall"))]
    covered = sum(s["true_shortfall"] <= s["predicted_shortfall_upper"] for s in stated)
    if stated:
        ci = binomtest(covered, len(stated)).proportion_ci(confidence_level=confidence,
                                                             method="exact")
        interval = [float(ci.low), float(ci.high)]
    else:
        interval = [math.nan, math.nan]
    accepted = [s for s in stages if s.get("accepted")]
    refused = [s for s in stages if not s.get("accepted")]
    shots = [r["calibrate"]["shots"] for r in records if "calibrate" in r]
    return {
        "stages": len(stages), "bound_stated": len(stated), "bound_covered": covered,
        "coverage": covered / len(stated) if stated else math.nan,
        "coverage_interval": interval, "bound_confidence": confidence,
        "accepted": len(accepted),
        "accepted_below_lower": sum(s["final_ratio"] < ACCEPT_FLOOR for s in accepted),
        "accepted_final_min": min((s["final_ratio"] for s in accepted), default=math.nan),
        "refused": len(refused),
        "refused_without_reason": sum(not one_line_reason(s) for s in refused),
        "calibration_shots_max": max(shots, default=math.nan),
        "calibration_shots_max_over_oracle": ratio_of(max(shots, default=math.nan),
                                                      oracle_shots),
        "rigs_below_min_inversion": sum(rig_below_acceptance(r, min_inversion)
                                        for r in records),
        "min_inversion": min_inversion,
    }


def allowed_misses(runs: int) -> int:
    """Scenarios allowed below 98 % under "at least 19 of 20": one per whole twenty."""
    return runs // 20


def target_row(name: str, target: str, measured: str, met: bool | None) -> dict[str, Any]:
    status = "not run" if met is None else "met" if met else "MISSED"
    return {"name": name, "target": target, "measured": measured,
            "met": None if met is None else bool(met), "status": status}
