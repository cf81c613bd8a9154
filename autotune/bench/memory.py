"""What a run costs beyond shots: the long run's memory (traced and resident, at checkpoints)
and the optimiser's overhead against the rig time of a step."""

from __future__ import annotations

import dataclasses
import gc
import resource
import tempfile
import time
import tracemalloc
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from autotune.run import runner
from autotune.config import (
    RunConfig,
)
from autotune.run.loop import build_strategy, search_space
from autotune.bench.jobs import config_from_spec, final_truth
from autotune.bench.plan import NIGHT_THERMAL_EVERY_S, StudyPlan, THERMAL_STEP_HZ, per_point_shots
from autotune.bench.scenarios import local_rig


def _memory_now() -> dict[str, float]:
    gc.collect()
    current, peak = tracemalloc.get_traced_memory()
    tracemalloc.reset_peak()
    rss_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    return {"traced_current_mib": current / 2**20, "traced_peak_mib": peak / 2**20,
            "max_rss_mib": rss_kib / 1024.0}


def night_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """A calibration then back-to-back retunes until ``steps`` measurements, memory traced."""
    config = config_from_spec(job["config"])
    scenario = job["scenario"]
    steps_wanted = int(job["steps"])
    tracemalloc.start()
    wall = time.perf_counter()
    rig = local_rig(job["rig"], scenario["perturbation"], scenario["rig_seed"])
    checkpoints: list[dict[str, Any]] = []
    steps = 0
    stages = {"calibrate": 0, "retune": 0, "still_good": 0, "not_accepted": 0}
    thermal_steps = 0
    sign = 1.0
    next_thermal = NIGHT_THERMAL_EVERY_S
    ratios = []
    with tempfile.TemporaryDirectory(prefix="autotune-bench-night-") as tmp:
        store = Path(tmp) / "last-good.json"
        k = 0
        while steps < steps_wanted:
            name = "calibrate" if not store.exists() else "retune"
            stage = runner.calibrate if name == "calibrate" else runner.retune
            stage_config = dataclasses.replace(config, search=dataclasses.replace(
                config.search, seed=(scenario["search_seed"] + k) % 2**32))
            result = stage(rig, stage_config, Path(tmp) / f"{k:04d}-{name}", store=store)
            k += 1
            stages[name] += 1
            stages["still_good"] += result["status"] == "still_good"
            stages["not_accepted"] += not result["accepted"]
            # Points, plus the retune's check, plus the verification (none after a pass).
            steps += int(result["points"]) + (name == "retune") + \
                (result["status"] != "still_good")
            ratios.append(final_truth(rig, result["setpoints"])["ratio"])
            if rig.sim.clock >= next_thermal:
                rig.thermal_step(sign * THERMAL_STEP_HZ)
                sign, thermal_steps = -sign, thermal_steps + 1
                next_thermal += NIGHT_THERMAL_EVERY_S
            checkpoints.append({"steps": steps, "stages": k, "rig_clock_h": rig.sim.clock / 3600.0,
                                "wall_s": time.perf_counter() - wall, **_memory_now()})
    tracemalloc.stop()
    return {"family": scenario["family"], "scenario": scenario["index"], "steps": steps,
            "stages": stages, "thermal_steps": thermal_steps,
            "rig_clock_h": rig.sim.clock / 3600.0,
            "final_ratio_median": float(np.median(ratios)),
            "final_ratio_min": float(np.min(ratios)),
            "wall_time_s": time.perf_counter() - wall, "checkpoints": checkpoints}


# --------------------------------------------------------------------------------------------
# Optimiser overhead (this process, after the jobs: a quiet machine)
# --------------------------------------------------------------------------------------------


def measure_overhead(config: RunConfig, plan: StudyPlan, rig: Mapping[str, Any],
                      scenario: Mapping[str, Any], stderr: float) -> dict[str, Any]:
    """Wall time of ask + tell of the Bayesian strategy as told points grow.

    The landscape is the simulated rig's noiseless truth (frozen clock) plus Gaussian noise of
    standard deviation ``stderr`` (that of one search point).
    """
    local = local_rig(rig, scenario["perturbation"], scenario["rig_seed"])
    box = {sp.name: (sp.search_min, sp.search_max) for sp in config.setpoints}
    nominal = {"velocity": config.nominal.two_pi_velocity, "detuning": 0.0}
    first = {n: min(max(nominal.get(n, (lo + hi) / 2), lo), hi) for n, (lo, hi) in box.items()}
    most = max(plan.overhead_points)
    strategy = build_strategy("bayesian", search_space(box), config, seed=scenario["search_seed"],
                              n_initial_points=config.search.n_initial_points, max_points=most,
                              initial_points=[first])
    rng = np.random.default_rng(scenario["search_seed"])
    ask_s, tell_s = [], []
    for _ in range(most):
        t0 = time.perf_counter()
        point = strategy.ask()
        t1 = time.perf_counter()
        value = float(local.truth(point)["inversion"]) + stderr * float(rng.standard_normal())
        t2 = time.perf_counter()
        strategy.tell(point, value, stderr)
        t3 = time.perf_counter()
        ask_s.append(t1 - t0)
        tell_s.append(t3 - t2)
    per_step_shots = per_point_shots(config)
    rate = float(local.describe().repetition_rate_hz)
    step_rig_s = per_step_shots / rate
    rows = []
    for n in plan.overhead_points:
        window = slice(max(0, n - plan.overhead_window), n)
        ask = float(np.median(ask_s[window]))
        tell = float(np.median(tell_s[window]))
        rows.append({"points": n, "ask_s": ask, "tell_s": tell, "ask_tell_s": ask + tell,
                     "fraction_of_step": (ask + tell) / step_rig_s})
    return {"repetition_rate_hz": rate, "step_shots": per_step_shots, "step_rig_time_s": step_rig_s,
            "noise_stderr": stderr, "window": plan.overhead_window, "rows": rows}
