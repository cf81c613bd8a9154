"""Where a phase-lock calibration's shots go by its bound's zone, and how the bound's realized falls
compare with the falls the search expected.

Runs the study's calibrations (the phase lock, the study's configuration and simulated rigs) of
development draws one by one, with an observer that reads the stage's own posterior after every
search step: the predicted shortfall's 95 % bound at the recommendation (what this stage's points
can lower) and the bound the best next point is expected to leave
(as :func:`autotune.analysis.next_point.expected_fall` reads it, a linear-Gaussian update). A calibration's
shots are those of the study's run of the same scenario (the observer only reads). Prints, per
family, the median shots (x the oracle floor) until the first finite bound, from it until the
bound first meets the acceptance bar, and from there until the search stops; then, over the steps
that took the point the search expected most of, the realized fall over the expected one, within
the bar and above it (benchmarks/README.md, "Session 11").

The observer reads the search's posterior through its private helpers, as
:mod:`autotune.analysis.next_point` does; it is a diagnostic, not part of the product.

    python3 benchmarks/bound_zones.py [--families main,mismatch,velocity_physics,zones_set_once] [--seed 111] [--family-seed-offset 1] [--scenarios 8] [--workers 2] [--bar 0.02]
"""

from __future__ import annotations

import argparse
import itertools
import math
import statistics
import sys
from typing import Any

from dev_calibrations import (
    FLOOR_SHOTS,
    SEARCH_PURPOSES,
    add_draw_arguments,
    calibrate,
    draw_errors,
    families_of,
    run_all,
)

from autotune.analysis.next_point import _best


class _Bounds:
    """Observer: after every search step, the bound now and the bound the best next point leaves."""

    def __init__(self) -> None:
        self.rows: list[dict[str, Any]] = []

    def __call__(self, points: int, lock: Any, session: Any) -> None:
        last = lock._obs[-1]
        row: dict[str, Any] = {"step": points, "purpose": last.purpose, "total": int(session.tally.shots)}
        plan = lock._velocity_plan()
        if last.purpose in SEARCH_PURPOSES and plan["concluded"] and lock._anchor() is not None:
            fit = lock._lock_fit(float(plan["velocity"]))
            if fit is not None and fit.slope_known():
                # The bound now and the candidate expected to lower it most per shot (what
                # next_point.expected_fall reads), its purpose with it.
                now, best = _best(lock, float(plan["velocity"]), lock._now(None))
                row.update(now=now.upper, after=best[5].upper, next=best[1])
        self.rows.append(row)


def _run(job: dict[str, Any]) -> dict[str, Any]:
    _, bounds, result, _ = calibrate(job, lambda rig: _Bounds(), "bound-zones-")
    scenario = job["scenario"]
    return {"family": scenario["family"], "scenario": scenario["index"], "shots": int(result["shots"]),
            "rows": bounds.rows}


def zones(run: dict[str, Any], bar: float) -> tuple[float, float, float]:
    """Shots (x floor) until the first finite bound, from it to the bar, from the bar to the stop."""
    rows = [r for r in run["rows"] if r["purpose"] in SEARCH_PURPOSES]
    if not rows:
        return 0.0, 0.0, 0.0
    finite = [r for r in rows if math.isfinite(r.get("now", math.inf))]
    first = finite[0] if finite else None
    within = next((r for r in finite if r["now"] <= bar), None)
    end = rows[-1]["total"]
    if first is None:
        return end / FLOOR_SHOTS, 0.0, 0.0
    to_bar = (within["total"] if within else end) - first["total"]
    return first["total"] / FLOOR_SHOTS, to_bar / FLOOR_SHOTS, \
        ((end - within["total"]) / FLOOR_SHOTS if within else 0.0)


def falls(runs: list[dict[str, Any]], bar: float) -> dict[tuple[str, str], tuple[int, float, float]]:
    """(zone, purpose) -> (steps, expected fall summed, realized fall summed), over the steps
    that measured the point the search expected most of."""
    out: dict[tuple[str, str], tuple[int, float, float]] = {}
    for run in runs:
        rows = [r for r in run["rows"] if "now" in r and math.isfinite(r["now"]) and math.isfinite(r["after"])]
        for a, b in itertools.pairwise(rows):
            if b["step"] != a["step"] + 1 or b["purpose"] != a["next"]:
                continue
            key = ("within the bar" if a["now"] <= bar else "above the bar", a["next"])
            n, e, r = out.get(key, (0, 0.0, 0.0))
            out[key] = (n + 1, e + a["now"] - a["after"], r + a["now"] - b["now"])
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    add_draw_arguments(parser, "main,mismatch,velocity_physics,zones_set_once")
    parser.add_argument("--bar", type=float, default=0.02, help="the acceptance bar (default 0.02, the study's)")
    ns = parser.parse_args(argv)
    wrong = draw_errors(ns)
    if wrong is None and not 0.0 < ns.bar < 1.0:
        wrong = f"expected 0 < --bar < 1 (got {ns.bar})"
    if wrong is not None:
        parser.error(wrong)
    families = families_of(ns)
    runs = run_all(ns, _run)
    print(f"the bound's zones (seed {ns.seed}, family seed offset {ns.family_seed_offset}; x floor = "
          f"shots / {FLOOR_SHOTS:,}; medians over the family's calibrations, which do not add up)")
    print(f"| family | calibration | until the first bound | first bound -> bound <= {ns.bar:.0%} | "
          f"bound <= {ns.bar:.0%} -> the stop | that last column per scenario |")
    print("|---|---|---|---|---|---|")
    for family in families:
        mine = [r for r in runs if r["family"] == family]
        z = [zones(r, ns.bar) for r in mine]
        med = [statistics.median(x[i] for x in z) for i in range(3)]
        print(f"| {family} | {statistics.median(r['shots'] for r in mine) / FLOOR_SHOTS:.2f} | "
              f"{med[0]:.2f} | {med[1]:.2f} | {med[2]:.2f} | {' '.join(f'{x[2]:.2f}' for x in z)} |")
    print("\nrealized fall of the bound over the expected one, summed over the steps that measured the "
          "point the search expected most of")
    for family in families:
        for (zone, purpose), (n, e, r) in sorted(falls([x for x in runs if x["family"] == family], ns.bar).items()):
            ratio = f"{r / e:.2f}" if e > 0 else "-"
            print(f"  {family:18s} {zone:15s} {purpose:9s} {n:3d} steps: expected {100 * e:6.2f} %, "
                  f"realized {100 * r:6.2f} %, ratio {ratio}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
