"""The study's statistics: quantiles, ratios to the oracle floor, the misses a sample size
allows, per strategy and family."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from autotune.bench.plan import LOWER_THRESHOLD, THERMAL_STEP_HZ, THRESHOLD


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


def summarise_retunes(records: Sequence[Mapping[str, Any]], oracle_shots: float
                       ) -> dict[str, Any]:
    done = [r for r in records if "skipped" not in r["retune"]]
    rows = [r["retune"] for r in done]
    summary = summarise(rows, oracle_shots)
    summary.update({
        "thermal_step_hz": THERMAL_STEP_HZ, "scenarios": len(records),
        "skipped": len(records) - len(done),
        "still_good": sum(r["status"] == "still_good" for r in rows),
        "moved_judged_still_good": sum(bool(r["moved_judged_still_good"]) for r in rows),
        "ratio_after_step_q": quantiles([r["ratio_after_step"] for r in rows]),
        "shots_over_calibration_q": quantiles(
            [r["retune"]["shots"] / r["calibrate"]["shots"] for r in done]),
    })
    return summary


def allowed_misses(runs: int) -> int:
    """Scenarios allowed below 98 % under "at least 19 of 20": one per whole twenty."""
    return runs // 20


def target_row(name: str, target: str, measured: str, met: bool | None) -> dict[str, Any]:
    status = "not run" if met is None else "met" if met else "MISSED"
    return {"name": name, "target": target, "measured": measured,
            "met": None if met is None else bool(met), "status": status}
