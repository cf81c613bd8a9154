"""The development draws' phase-lock calibrations, run one by one with an observer: what the
diagnostic scripts of this folder share (benchmarks/velocity_breakdown.py,
benchmarks/bound_zones.py). Not a script of its own."""

from __future__ import annotations

import argparse
import dataclasses
import logging
import sys
import tempfile
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any

import structlog

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from autotune.bench import plan as bench_plan
from autotune.bench import scenarios as bench_scenarios
from autotune.run import runner

FLOOR_SHOTS = 72_000  # the study's oracle floor: the 72,000-shot verification at the true best
# The purposes of a calibration's search steps (the verification's excluded), which the
# observers of bound_zones.py and bound_terms.py read the posterior after.
SEARCH_PURPOSES = ("lock", "velocity", "relock", "search")


def add_draw_arguments(parser: argparse.ArgumentParser, families: str) -> None:
    """--families (default ``families``), --seed, --family-seed-offset, --scenarios, --workers."""
    parser.add_argument("--families", default=families, help=f"comma-separated scenario families (default {families})")
    parser.add_argument("--seed", type=int, default=111, help="seed of the main draw (default 111, a dev draw)")
    parser.add_argument("--family-seed-offset", type=int, default=1,
                        help="added to every other family's seed (default 1, a dev draw; 0 is the study's)")
    parser.add_argument("--scenarios", type=int, default=8, help="scenarios per family (default 8)")
    parser.add_argument("--workers", type=int, default=2, help="worker processes (default 2)")


def families_of(ns: argparse.Namespace) -> tuple[str, ...]:
    return tuple(name.strip() for name in ns.families.split(",") if name.strip())


def draw_errors(ns: argparse.Namespace) -> str | None:
    """What is wrong with the draw arguments, or None."""
    unknown = [name for name in families_of(ns) if name not in bench_scenarios.FAMILIES]
    if unknown or ns.scenarios < 1 or ns.workers < 1:
        return (f"expected families among {sorted(bench_scenarios.FAMILIES)} (got {unknown}), "
                "--scenarios >= 1 and --workers >= 1")
    return None


def run_all(ns: argparse.Namespace, run: Callable[[dict[str, Any]], dict[str, Any]]) -> list[dict[str, Any]]:
    """``run`` (a module-level function, for the worker processes) on each calibration job of the
    draws, ``ns.workers`` at a time; the results sorted by family and scenario."""
    plan = bench_plan.plan_for("full", workers=ns.workers, scenarios=ns.scenarios, seed=ns.seed,
                               strategies=("phase_lock",))
    plan = dataclasses.replace(plan, family_seed_offset=ns.family_seed_offset, families=families_of(ns),
                               night_steps=0, overhead_points=(), night_study=False)
    base = bench_plan.base_config(plan, bench_plan.DEFAULT_RUN_CONFIG)
    config = bench_plan.strategy_configs(base, plan)["phase_lock"]
    rig = bench_scenarios.rig_data(bench_plan.DEFAULT_RIG_CONFIG)
    jobs = [{"config": config, "scenario": scenario, "rig": rig}
            for family, scenarios in bench_plan.family_scenarios(plan).items() for scenario in scenarios]
    with ProcessPoolExecutor(max_workers=ns.workers) as pool:
        return sorted(pool.map(run, jobs), key=lambda r: (r["family"], r["scenario"]))


def calibrate(job: dict[str, Any], observer: Callable[[Any], Any], prefix: str,
              read: Callable[[Path], Any] | None = None) -> tuple[Any, Any, dict[str, Any], Any]:
    """One job's calibration on its scenario's rig, the study's search seed, logs silenced:
    ``observer(rig)`` makes the observer; returns the rig, the observer, the runner's result
    and ``read(run folder)`` before the folder is removed (None without ``read``)."""
    structlog.configure(wrapper_class=structlog.make_filtering_bound_logger(logging.CRITICAL))
    config, scenario = job["config"], job["scenario"]
    config = dataclasses.replace(config, search=dataclasses.replace(config.search,
                                                                     seed=scenario["search_seed"]))
    rig = bench_scenarios.local_rig(job["rig"], scenario["perturbation"], scenario["rig_seed"])
    watcher = observer(rig)
    with tempfile.TemporaryDirectory(prefix=prefix) as tmp:
        result = runner.calibrate(rig, config, Path(tmp) / "calibrate", store=Path(tmp) / "last-good.json",
                                  observer=watcher)
        extra = read(Path(tmp) / "calibrate") if read is not None else None
    return rig, watcher, result, extra
