"""Where a phase-lock calibration's velocity stage spends its shots: the bound's terms step by step.

Runs the study's calibrations (the phase lock, the study's configuration and simulated rigs) of
development draws one by one, with an observer that reads the stage's own posterior after every
step: the predicted shortfall's 95 % bound at the recommendation and its detuning and velocity
terms, the velocity term with the absorption fit's covariance set to zero (the inversion
residual alone) and with the residual's set to zero (the absorption alone), and the standard
error of the residual's slope. A calibration's shots, points and final true ratio are those of
the study's run of the same scenario (the observer only reads). Prints one Markdown row per
calibration (benchmarks/README.md, "Session 9"); ``--steps`` prints every step as well.

The observer reads the search's posterior through its private helpers, as
:mod:`autotune.analysis.next_point` does; it is a diagnostic, not part of the product.

    python3 benchmarks/velocity_breakdown.py [--families main,mismatch,velocity_physics] [--seed 111] [--family-seed-offset 1] [--scenarios 8] [--workers 2] [--steps]
"""

from __future__ import annotations

import argparse
import math
import sys
from typing import Any

import numpy as np
from dev_calibrations import (
    FLOOR_SHOTS,
    add_draw_arguments,
    calibrate,
    draw_errors,
    run_all,
)

from autotune.bench.jobs import shots_by_purpose
from autotune.run.journal import JOURNAL_NAME


class _Steps:
    """Observer: after every search step, the stage's bound and its parts at the recommendation."""

    def __init__(self, rig: Any) -> None:
        self.rig = rig
        self.rows: list[dict[str, Any]] = []

    def __call__(self, points: int, lock: Any, session: Any) -> None:
        last = lock._obs[-1]
        row: dict[str, Any] = {"step": points, "purpose": last.purpose, "velocity": last.velocity,
                               "shots": last.result.shots, "total": int(session.tally.shots)}
        rec = lock.recommend().point
        truth = self.rig.truth(rec)
        row["ratio"] = float(truth["inversion"]) / float(truth["best"]["inversion"])
        clock = lock._now(None)
        short = lock._shortfall_at(rec, clock, inherit=False)
        row.update(upper=short.upper, detuning=short.detuning_upper, velocity_term=short.velocity_upper)
        curve = lock._velocity_curve()
        if curve is not None and lock._velocity_plan()["concluded"]:
            zero = np.zeros((3, 3))
            row["residual_only"] = lock._shortfall_at(rec, clock, absorption_cov=zero, inherit=False).velocity_upper
            row["absorption_only"] = lock._shortfall_at(rec, clock, residual_cov=zero, inherit=False).velocity_upper
            row["residual_slope_sd"] = math.sqrt(max(float(curve.residual_cov[1, 1]), 0.0))
        self.rows.append(row)


def _run(job: dict[str, Any]) -> dict[str, Any]:
    rig, steps, result, purposes = calibrate(job, _Steps, "velocity-breakdown-",
                                             read=lambda run: shots_by_purpose(run / JOURNAL_NAME))
    scenario = job["scenario"]
    truth = rig.truth(dict(result["setpoints"]))
    return {"family": scenario["family"], "scenario": scenario["index"], "shots": int(result["shots"]),
            "ratio": float(truth["inversion"]) / float(truth["best"]["inversion"]),
            "purposes": purposes, "steps": steps.rows}


def _percent(row: dict[str, Any] | None, key: str) -> str:
    value = None if row is None else row.get(key)
    return "-" if value is None or not math.isfinite(value) else f"{100 * value:.2f}"


def _table_row(run: dict[str, Any]) -> str:
    steps = run["steps"]
    count = {p: sum(s["purpose"] == p for s in steps) for p in ("lock", "velocity", "relock")}
    velocity_shots = [s["shots"] for s in steps if s["purpose"] == "velocity"]
    modelled = [s for s in steps if "residual_slope_sd" in s]
    first = modelled[0] if modelled else None
    last = modelled[-1] if modelled else None
    after = sum(1 for s in steps[steps.index(first) + 1:] if s["purpose"] == "lock") if first else 0
    shots = f"{min(velocity_shots):,}-{max(velocity_shots):,}" if velocity_shots else "-"
    slope = f"{first['residual_slope_sd']:.3f} -> {last['residual_slope_sd']:.3f}" if first else "-"
    return (f"| {run['family']} {run['scenario']} | {run['shots'] / FLOOR_SHOTS:.2f} | "
            f"{count['lock']} / {count['velocity']} / {count['relock']} | {shots} | "
            f"{_percent(first, 'upper')} ({_percent(first, 'detuning')}, {_percent(first, 'velocity_term')}) | "
            f"{_percent(last, 'upper')} ({_percent(last, 'detuning')}, {_percent(last, 'velocity_term')}; "
            f"{_percent(last, 'residual_only')}, {_percent(last, 'absorption_only')}) | {slope} | {after} |")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    add_draw_arguments(parser, "main,mismatch,velocity_physics")
    parser.add_argument("--steps", action="store_true", help="print every step of every calibration too")
    ns = parser.parse_args(argv)
    wrong = draw_errors(ns)
    if wrong is not None:
        parser.error(wrong)
    runs = run_all(ns, _run)
    print(f"velocity stage, step by step (seed {ns.seed}, family seed offset {ns.family_seed_offset}; "
          f"x floor = shots / {FLOOR_SHOTS:,}; bounds in %)")
    print("| scenario | x floor | points: lock / velocity / relock | velocity step shots (min-max) | "
          "first bound (d, v) | at the stop: bound (d, v; v residual only, absorption only) | "
          "r1 sd first -> stop | lock points after the first bound |")
    print("|---|---|---|---|---|---|---|---|")
    for run in runs:
        print(_table_row(run))
    if ns.steps:
        for run in runs:
            print(f"\n{run['family']} {run['scenario']}: {run['shots']:,} shots, true ratio {run['ratio']:.4f}, "
                  f"by purpose {run['purposes']}")
            for s in run["steps"]:
                print(f"  {s['step']:2d} {s['purpose']:8s} {s['velocity']:6.1f} m/s {s['shots']:6,d} shots "
                      f"(total {s['total'] / FLOOR_SHOTS:.2f}x) ratio {s['ratio']:.4f} bound {_percent(s, 'upper')} "
                      f"(d {_percent(s, 'detuning')}, v {_percent(s, 'velocity_term')}; residual only "
                      f"{_percent(s, 'residual_only')}, absorption only {_percent(s, 'absorption_only')})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
