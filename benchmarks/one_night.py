"""One track night of the night study run alone, its run folder and truth kept, and its checks
traced against the ratio to the moving true best (benchmarks/README.md, "Session 12").

Builds the night study's job for one family and scenario exactly as ``python -m autotune.bench
--night`` does (the same draw arguments), runs it in this process with the night's folder kept
under ``--keep`` and the truth samples written beside it (``samples.json``: rig s from the
night's start, ratio), then prints one line per check: its time, the ratio there and the least
ratio since the check before, the check's z, chart zone and action, the plan's interval, the
wait to the next check (``sooner`` in the middle zone), and every alarm, retune and step. (In
session 12 it also marked the checks the reverted ``reach_s`` brought forward.) A diagnostic,
not part of the product.

    python3 benchmarks/one_night.py --family zones_set_once --scenario 0 --seed 777 \
        --family-seed-offset 1 --keep /tmp/night-zso0
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import json
import logging
import math
import shutil
import sys
from pathlib import Path
from typing import Any

import structlog

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from autotune.bench import night_rig
from autotune.bench import plan as bench_plan
from autotune.bench.night_study import night_jobs
from autotune.bench.scenarios import FAMILIES, rig_data
from autotune.run.journal import read_journal


def _job(ns: argparse.Namespace) -> dict[str, Any]:
    plan = bench_plan.plan_for("full", workers=1, scenarios=ns.scenarios, seed=ns.seed,
                               night_only=True)
    plan = dataclasses.replace(plan, family_seed_offset=ns.family_seed_offset,
                               night_families=(ns.family,), night_schedules=False)
    base = bench_plan.base_config(plan, bench_plan.DEFAULT_RUN_CONFIG)
    jobs = [j for j in night_jobs(plan, base, rig_data(bench_plan.DEFAULT_RIG_CONFIG))
            if j["scenario"]["index"] == ns.scenario and j["quiet"] == ns.quiet]
    if not jobs:
        raise SystemExit(f"error: no {'quiet ' if ns.quiet else ''}night for scenario "
                         f"{ns.scenario} of {ns.family} with --scenarios {ns.scenarios}")
    return jobs[0]


def run(ns: argparse.Namespace) -> dict[str, Any]:
    """The night, its folder kept under ``ns.keep``: the study's record."""
    keep = Path(ns.keep)
    if keep.exists():
        shutil.rmtree(keep)
    keep.mkdir(parents=True)
    watched: list[Any] = []

    @contextlib.contextmanager
    def kept(prefix: str = "") -> Any:
        yield str(keep)

    class Watched(night_rig._NightRig):
        def __init__(self, *args: Any, **kwargs: Any) -> None:
            super().__init__(*args, **kwargs)
            watched.append(self)

    structlog.configure(wrapper_class=structlog.make_filtering_bound_logger(logging.CRITICAL))
    night_rig.tempfile.TemporaryDirectory = kept  # type: ignore[assignment]
    night_rig._NightRig = Watched  # type: ignore[misc]
    record = night_rig.hold_night_job(_job(ns))
    if watched:
        start = watched[0].samples[0][0] if watched[0].samples else 0.0
        (keep / "samples.json").write_text(json.dumps(
            {"start_clock": start, "samples": [(t - start, r) for t, r in watched[0].samples],
             "steps": [{**s, "t": s["clock"] - start} for s in watched[0].applied]}))
    (keep / "record.json").write_text(json.dumps(record, default=str))
    return record


def trace(keep: Path, bar: float = 0.97) -> None:
    """One line per check of the kept night (see the module's docstring)."""
    data = json.loads((keep / "samples.json").read_text())
    start, samples = data["start_clock"], data["samples"]
    steps = sorted(data["steps"], key=lambda s: s["t"])
    interval = None
    last_t = 0.0
    print(f"{'t min':>7} {'ratio':>6} {'least':>6} {'held':>5}  event")

    def step_lines(upto: float) -> None:
        while steps and steps[0]["t"] <= upto:
            step = steps.pop(0)
            print(f"{step['t'] / 60:7.1f} {'':>6} {'':>6} {'':>5}  STEP "
                  f"{step['shift_hz'] / 1e3:+.0f} kHz")

    for rec in read_journal(keep / "night" / "journal.jsonl"):
        kind = rec.get("type")
        if kind == "decision" and rec.get("what") != "hold":
            what = rec.get("what")
            plan = rec.get("plan") or {}
            if what == "plan" and plan:
                interval = plan.get("interval_s")
                inputs = plan.get("inputs") or {}
                print(f"{'':>7} {'':>6} {'':>6} {'':>5}  plan: interval {interval / 60:.1f} min, "
                      f"{plan.get('shots_per_phase')} shots/phase, share "
                      f"{plan.get('check_share', 0) * 100:.2f} %, innovation sd "
                      f"{inputs.get('innovation_sd_hz') or float('nan'):.0f} Hz, step z "
                      f"{inputs.get('step_z') or float('nan'):.2f}")
            elif what not in ("check",):
                print(f"{'':>7} {'':>6} {'':>6} {'':>5}  {what}: "
                      f"{str(rec.get('reason') or rec.get('detail') or '')[:200]}")
            continue
        if kind != "hold":
            continue
        st, numbers = rec.get("state") or {}, rec.get("numbers") or {}
        clock = rec.get("clock_s")
        if clock is None:
            continue
        t = float(clock) - start
        step_lines(t)
        window = [r for s, r in samples if last_t <= s <= t]
        now = min(samples, key=lambda x: abs(x[0] - t))[1]
        least = min(window, default=now)
        held = sum(1 for r in window if r >= bar) / max(len(window), 1)
        nxt = st.get("next") or {}
        innovation = numbers.get("innovation") or {}
        wait = (float(nxt["due_clock"]) - float(clock)) / 60 if nxt.get("due_clock") else math.nan
        sd = math.sqrt(innovation["variance_hz2"]) if innovation.get("variance_hz2") else math.nan
        print(f"{t / 60:7.1f} {now:6.3f} {least:6.3f} {held:5.2f}  check {rec.get('point')}: "
              f"innov {innovation.get('value_hz') or math.nan:+7.0f} Hz sd {sd:5.0f} "
              f"z {innovation.get('z') or math.nan:+.2f} gain {innovation.get('gain') or math.nan:.2f} "
              f"S+ {numbers.get('upper') or 0:.2f} S- {numbers.get('lower') or 0:.2f} "
              f"{rec.get('action')}{'/' + numbers['alarm'] if numbers.get('alarm') else ''}; "
              f"next in {wait:.1f} min{' recheck' if nxt.get('recheck') else ''}"
              f"{' sooner' if nxt.get('sooner') else ''}"
              f" (plan {(interval or 0) / 60:.1f})")
        last_t = t
    step_lines(math.inf)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--family", default="zones_set_once", choices=sorted(FAMILIES))
    parser.add_argument("--scenario", type=int, default=0)
    parser.add_argument("--scenarios", type=int, default=2, help="scenarios drawn per family (default 2)")
    parser.add_argument("--seed", type=int, default=777)
    parser.add_argument("--family-seed-offset", type=int, default=1)
    parser.add_argument("--quiet", action="store_true", help="the quiet night (no steps, no ramp)")
    parser.add_argument("--keep", required=True, help="folder for the night's run folder (replaced)")
    parser.add_argument("--trace-only", action="store_true", help="trace a kept night, run nothing")
    ns = parser.parse_args(argv)
    if not ns.trace_only:
        record = run(ns)
        print(json.dumps({k: record.get(k) for k in (
            "fraction_097", "holding_share", "recovery_s", "detection_s", "checks", "alarms",
            "retunes", "budget_unheld_s")}, default=str))
    trace(Path(ns.keep))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
