"""The benchmark study: shots to calibrate, the oracle floor, optimiser overhead, a night's memory.

Run ``python -m autotune.bench`` (full study), ``--quick`` (a few minutes) or ``--tiny`` (the
smoke test's sizes). It writes a JSON file (``--out``, default
``benchmarks/results/latest.json``) and prints a table. Every figure is measured on the bundled
SIMULATED rig in this process (:class:`autotune.server.LocalRig`: the real protocol's encoder,
server handler and parsers without a socket). This module is a study on the simulated rig, like
the dry run, so it is one of the few places in ``autotune`` that imports ``drivers_sim``; it does
so lazily, inside the functions that build rigs, so importing ``autotune`` never pulls it in.

Sections of the study
---------------------
1. Shots to calibrate. Scenarios are drawn by seeded random perturbation of the demo rig
   (``configs/sim-rig.toml``) over :data:`SCENARIO_RANGES`, never picked by hand. Every
   strategy calibrates every scenario through :func:`autotune.runner.calibrate` with the same
   fringe measurement per point; an observer reads the truth at the current recommendation
   after each point. Per strategy: median and quartiles of the shots and rig time until the
   true inversion at the recommendation first reaches ``THRESHOLD`` of the true best of that
   moment, the final true ratio at the verified set-points, and the failures (never reached).
   A failure counts as infinitely many shots in the quantiles ("never" in the table).
2. Oracle floor: the shots of the final verification alone, measured at the true best
   set-points (a one-point run whose box is the true best), so its precision equals that of
   every strategy's verification. Ratios of every strategy's median shots to it.
3. Optimiser overhead: wall time of the Bayesian strategy's ``ask`` plus ``tell`` as the told
   points grow, against the rig time of one step at the rig's repetition rate.
4. A long run: a calibration, then back-to-back retunes (drift on, a thermal step every two rig
   hours, alternating sign) for several hundred steps; traced (tracemalloc) and resident
   (getrusage) memory at checkpoints.
5. Retune: after each Bayesian calibration a thermal step (15 kHz) and a retune; its shots as a
   ratio to the calibration's.

The targets (issue 5) are printed beside the measured ratios with "met" or "MISSED".
"""

from __future__ import annotations

import argparse
import dataclasses
import gc
import json
import logging
import math
import multiprocessing
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
import tracemalloc
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import structlog

from autotune import runner
from autotune.config import RunConfig, load_config
from autotune.loop import build_strategy, search_space

__all__ = [
    "THRESHOLD",
    "SCENARIO_RANGES",
    "STRATEGIES",
    "StudyPlan",
    "plan_for",
    "make_scenarios",
    "strategy_configs",
    "quantiles",
    "run_study",
    "format_table",
    "write_result",
    "main",
]

REPO = Path(__file__).resolve().parents[1]
DEFAULT_RUN_CONFIG = REPO / "configs" / "dry-run.toml"
DEFAULT_RIG_CONFIG = REPO / "configs" / "sim-rig.toml"
DEFAULT_OUT = REPO / "benchmarks" / "results" / "latest.json"

#: Fraction of the true best inversion that counts as "calibrated".
THRESHOLD = 0.98

STRATEGIES: tuple[str, ...] = ("bayesian", "coordinate", "grid", "random")

#: Uniform ranges of the scenario perturbation: (section, key) -> (low, high), SI units.
#: The demo values (PHYSICS.md section 6) lie inside every range.
SCENARIO_RANGES: dict[tuple[str, str], tuple[float, float]] = {
    ("beam", "velocity_bias_m_per_s"): (-15.0, 15.0),
    ("cavity", "coupling_hz"): (46e3, 52e3),
    ("cavity", "initial_offset_hz"): (-20e3, 20e3),
    ("stark", "coefficient_error"): (-0.03, 0.03),
    # 4 kHz per hour is 1.11 Hz/s; the range spans -8 .. +8 kHz per hour.
    ("drift", "ramp_hz_per_s"): (-2.2, 2.2),
    ("drift", "random_walk_hz_per_sqrt_s"): (5.0, 20.0),
}

#: The thermal step before each scenario's retune, Hz (PHYSICS.md section 6).
THERMAL_STEP_HZ = 15e3

#: Rig time between thermal steps of the long run, s.
NIGHT_THERMAL_EVERY_S = 7200.0

# --------------------------------------------------------------------------------------------
# Plan
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class StudyPlan:
    """Sizes of one study.

    Attributes
    ----------
    mode : str
        ``"full"``, ``"quick"`` or ``"tiny"`` (recorded).
    scenarios : int
        Number of seeded scenarios.
    seed : int
        Seed of the scenario draw (and of every run's rig and search).
    strategies : tuple of str
        Strategies compared.
    night_steps : int
        Measurements (points, checks, verifications) of the long run.
    overhead_points : tuple of int
        Told points at which the optimiser overhead is reported.
    overhead_window : int
        Steps averaged (median) before each checkpoint.
    retune : bool
        Run a thermal step and a retune after each Bayesian calibration.
    workers : int
        Processes of the pool (1: everything in this process).
    measurement : Mapping
        Overrides of ``[measurement]`` shared by all strategies (empty: the config's).
    search : Mapping
        Overrides of ``[search]`` of the Bayesian strategy (empty: the config's).
    retune_settings : Mapping
        Overrides of ``[retune]`` (empty: the config's).
    grid_points_per_dimension, coordinate_points_per_dimension, coordinate_rounds : int
        The hand strategies' designs.
    """

    mode: str
    scenarios: int
    seed: int = 20261205
    strategies: tuple[str, ...] = STRATEGIES
    night_steps: int = 400
    overhead_points: tuple[int, ...] = (10, 25, 50, 100, 150, 200)
    overhead_window: int = 5
    retune: bool = True
    workers: int = 2
    measurement: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    search: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    retune_settings: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    grid_points_per_dimension: int = 9
    coordinate_points_per_dimension: int = 9
    coordinate_rounds: int = 3


def plan_for(mode: str, *, workers: int = 2, scenarios: int | None = None,
             seed: int | None = None) -> StudyPlan:
    """The plan of a named mode: ``"full"``, ``"quick"`` or ``"tiny"``.

    Full and quick use the demo measurement and budgets unchanged (quick has fewer scenarios, a
    shorter night); tiny shrinks every size so that the smoke test runs in seconds.
    """
    if mode == "full":
        plan = StudyPlan("full", scenarios=20, workers=workers)
    elif mode == "quick":
        # The overhead study stops at 100 points: the steps beyond cost most of its time.
        plan = StudyPlan("quick", scenarios=4, night_steps=100,
                         overhead_points=(10, 25, 50, 100), overhead_window=3, workers=workers)
    elif mode == "tiny":
        plan = StudyPlan(
            "tiny", scenarios=1, night_steps=8, overhead_points=(10, 16), overhead_window=2,
            workers=workers,
            measurement={"shots_per_phase": 300, "verification_shots_per_phase": 600,
                         "resamples": 200},
            search={"max_points": 10, "min_points": 6, "n_initial_points": 4},
            retune_settings={"max_points": 3, "n_initial_points": 2,
                             "check_shots_per_phase": 600},
            grid_points_per_dimension=3, coordinate_points_per_dimension=3, coordinate_rounds=1,
        )
    else:
        raise ValueError(f"mode: expected 'full', 'quick' or 'tiny', got {mode!r}")
    changes: dict[str, Any] = {}
    if scenarios is not None:
        if scenarios < 1:
            raise ValueError(f"scenarios: expected an integer >= 1, got {scenarios!r}")
        changes["scenarios"] = scenarios
    if seed is not None:
        changes["seed"] = seed
    return dataclasses.replace(plan, **changes)


def _base_config(plan: StudyPlan, config_path: Path) -> RunConfig:
    config = load_config(config_path)
    return dataclasses.replace(
        config,
        measurement=dataclasses.replace(config.measurement, **dict(plan.measurement)),
        search=dataclasses.replace(config.search, **dict(plan.search)),
        retune=dataclasses.replace(config.retune, **dict(plan.retune_settings)),
    )


def _per_point_shots(config: RunConfig) -> int:
    return 2 * config.measurement.ramsey_phases * config.measurement.shots_per_phase


def strategy_configs(base: RunConfig, plan: StudyPlan) -> dict[str, RunConfig]:
    """One configuration per strategy; hand strategies get the budget to finish their design.

    The Bayesian search keeps the configured budget. The grid gets ``n x n`` points, the
    coordinate scan ``n x 2 x rounds`` points, and random search as many points as the Bayesian
    search may use; their shot and rig-time budgets are raised to fit those points.
    """
    per_point = _per_point_shots(base)
    s = base.search
    dims = len(base.setpoints)
    designs = {
        "bayesian": None,
        "grid": plan.grid_points_per_dimension ** dims,
        "coordinate": plan.coordinate_points_per_dimension * dims * plan.coordinate_rounds,
        "random": s.max_points,
    }
    out = {}
    for kind in plan.strategies:
        points = designs[kind]
        search = dataclasses.replace(
            s, strategy=kind, grid_points_per_dimension=plan.grid_points_per_dimension,
            coordinate_points_per_dimension=plan.coordinate_points_per_dimension,
            coordinate_rounds=plan.coordinate_rounds)
        if points is not None:
            # Shots and rig time of the design, with room for the moves between points.
            search = dataclasses.replace(
                search, max_points=points, max_shots=max(s.max_shots, points * per_point),
                max_rig_time_s=max(s.max_rig_time_s, 2.0 * points * per_point / 150.0))
        out[kind] = dataclasses.replace(base, search=search)
    return out


def _settings_of(config: RunConfig) -> dict[str, Any]:
    s, m = config.search, config.measurement
    settings: dict[str, Any] = {
        "box": {sp.name: [sp.search_min, sp.search_max] for sp in config.setpoints},
        "shots_per_phase": m.shots_per_phase, "ramsey_phases": m.ramsey_phases,
        "verification_shots_per_phase": m.verification_shots_per_phase,
        "max_points": s.max_points, "max_shots": s.max_shots, "max_rig_time_s": s.max_rig_time_s,
    }
    if s.strategy == "bayesian":
        settings.update(n_initial_points=s.n_initial_points, min_points=s.min_points,
                        exploration=s.exploration)
    elif s.strategy == "grid":
        settings["points_per_dimension"] = s.grid_points_per_dimension
    elif s.strategy == "coordinate":
        settings.update(points_per_dimension=s.coordinate_points_per_dimension,
                        rounds=s.coordinate_rounds)
    else:
        settings["n_points"] = s.max_points
    return settings


# --------------------------------------------------------------------------------------------
# Scenarios
# --------------------------------------------------------------------------------------------


def make_scenarios(count: int, seed: int) -> list[dict[str, Any]]:
    """``count`` scenarios drawn uniformly over :data:`SCENARIO_RANGES` from ``seed``.

    Each scenario is ``{"index", "rig_seed", "search_seed", "perturbation": {section: {key:
    value}}}``; scenario ``k`` depends only on ``seed`` and ``k``.
    """
    scenarios = []
    for k in range(count):
        rng = np.random.default_rng(np.random.SeedSequence([seed, k]))
        perturbation: dict[str, dict[str, float]] = {}
        for (section, key), (low, high) in SCENARIO_RANGES.items():
            perturbation.setdefault(section, {})[key] = float(rng.uniform(low, high))
        rig_seed, search_seed = (int(x) for x in rng.integers(0, 2**31 - 1, size=2))
        scenarios.append({"index": k, "rig_seed": rig_seed, "search_seed": search_seed,
                          "perturbation": perturbation})
    return scenarios


def _local_rig(rig_config_path: str, perturbation: Mapping[str, Mapping[str, float]],
               seed: int) -> Any:
    # A study on the simulated rig: drivers_sim is imported here only (see the module docstring).
    from autotune.server import LocalRig
    from drivers_sim.config import load_sim_config, sim_config_from_dict
    from drivers_sim.driver import SimulatedDriver
    from drivers_sim.rig import SimulatedRig

    data = load_sim_config(rig_config_path).to_dict()
    for section, values in perturbation.items():
        data[section].update(values)
    sim = sim_config_from_dict(data, source=f"<{rig_config_path} perturbed>")
    return LocalRig(SimulatedDriver(SimulatedRig(sim, seed=seed)))


# --------------------------------------------------------------------------------------------
# Jobs (run in the pool's worker processes)
# --------------------------------------------------------------------------------------------


class _Follower:
    """Observer: the truth at the recommendation after every told point."""

    def __init__(self, rig: Any) -> None:
        self.rig = rig
        self.clock_start = rig.sim.clock
        self.reached: dict[str, float] | None = None
        self.best_ratio = -math.inf

    def __call__(self, points: int, strategy: Any, session: Any) -> None:
        truth = self.rig.truth(strategy.recommend().point)
        ratio = float(truth["inversion"]) / float(truth["best"]["inversion"])
        self.best_ratio = max(self.best_ratio, ratio)
        if self.reached is None and ratio >= THRESHOLD:
            self.reached = {"points": points, "shots": int(session.tally.shots),
                            "acquisition_time_s": float(session.tally.rig_time_s),
                            "rig_time_s": float(truth["clock"]) - self.clock_start,
                            "ratio": ratio}


def _final_truth(rig: Any, setpoints: Mapping[str, float]) -> dict[str, float]:
    truth = rig.truth(dict(setpoints))
    return {"inversion": float(truth["inversion"]), "best": float(truth["best"]["inversion"]),
            "ratio": float(truth["inversion"]) / float(truth["best"]["inversion"])}


def _stage_record(result: Mapping[str, Any], follower: _Follower, rig: Any,
                  clock_start: float, wall_s: float) -> dict[str, Any]:
    final = _final_truth(rig, result["setpoints"])
    reached = follower.reached
    return {
        "status": result["status"], "stop_reason": result["stop_reason"],
        "points": int(result["points"]), "shots": int(result["shots"]),
        "acquisition_time_s": float(result["rig_time_s"]),
        "rig_time_s": float(rig.sim.clock) - clock_start,
        "verified_inversion": float(result["inversion"]),
        "verified_stderr": float(result["inversion_stderr"]),
        "final_true_inversion": final["inversion"], "final_true_best": final["best"],
        "final_ratio": final["ratio"],
        "reached": reached is not None,
        "points_to_threshold": None if reached is None else reached["points"],
        "shots_to_threshold": None if reached is None else reached["shots"],
        "rig_time_to_threshold_s": None if reached is None else reached["rig_time_s"],
        "best_ratio_seen": follower.best_ratio if math.isfinite(follower.best_ratio) else None,
        "wall_time_s": wall_s,
    }


def _quiet_logging() -> None:
    structlog.configure(wrapper_class=structlog.make_filtering_bound_logger(logging.WARNING))


def _calibration_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """Calibrate one scenario with one strategy (then, for Bayesian, step and retune)."""
    config: RunConfig = job["config"]
    scenario = job["scenario"]
    config = dataclasses.replace(config, search=dataclasses.replace(
        config.search, seed=scenario["search_seed"]))
    rig = _local_rig(job["rig_config"], scenario["perturbation"], scenario["rig_seed"])
    record: dict[str, Any] = {"scenario": scenario["index"], "strategy": config.search.strategy}
    with tempfile.TemporaryDirectory(prefix="autotune-bench-") as tmp:
        store = Path(tmp) / "last-good.json"
        follower = _Follower(rig)
        clock_start, wall = rig.sim.clock, time.perf_counter()
        result = runner.calibrate(rig, config, Path(tmp) / "calibrate", store=store,
                                  observer=follower)
        record["calibrate"] = _stage_record(result, follower, rig, clock_start,
                                            time.perf_counter() - wall)
        if job.get("retune"):
            if not result["accepted"]:
                record["retune"] = {"skipped": "calibration not accepted, no last good setting"}
            else:
                rig.thermal_step(THERMAL_STEP_HZ)
                before = _final_truth(rig, result["setpoints"])
                follower = _Follower(rig)
                clock_start, wall = rig.sim.clock, time.perf_counter()
                result = runner.retune(rig, config, Path(tmp) / "retune", store=store,
                                       observer=follower)
                record["retune"] = _stage_record(result, follower, rig, clock_start,
                                                 time.perf_counter() - wall)
                record["retune"]["ratio_after_step"] = before["ratio"]
    return record


def _oracle_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """Verify at the true best set-points only: the shots and precision of that verification."""
    config: RunConfig = job["config"]
    scenario = job["scenario"]
    rig = _local_rig(job["rig_config"], scenario["perturbation"], scenario["rig_seed"])
    best = rig.truth()["best"]["setpoints"]
    # A box of +-1e-6 of a unit around the truth's best and a one-point grid: the run measures
    # one search point there (not counted) and verifies there with the configured shots.
    setpoints = tuple(dataclasses.replace(sp, search_min=best[sp.name] - 1e-6,
                                          search_max=best[sp.name] + 1e-6)
                      for sp in config.setpoints)
    changes: dict[str, Any] = {"strategy": "grid", "grid_points_per_dimension": 1,
                               "max_points": 1, "min_points": 1, "seed": scenario["search_seed"]}
    if "refine_points" in {f.name for f in dataclasses.fields(config.search)}:
        # No refinement scan after the search: the oracle pays for the verification only.
        changes["refine_points"] = 0
    search = dataclasses.replace(config.search, **changes)
    config = dataclasses.replace(config, setpoints=setpoints, search=search)
    with tempfile.TemporaryDirectory(prefix="autotune-bench-") as tmp:
        result = runner.calibrate(rig, config, Path(tmp) / "oracle",
                                  store=Path(tmp) / "last-good.json")
    verify_shots = 2 * config.measurement.ramsey_phases * \
        config.measurement.verification_shots_per_phase
    return {"scenario": scenario["index"], "verification_shots": verify_shots,
            "total_shots": int(result["shots"]), "verified_inversion": float(result["inversion"]),
            "verified_stderr": float(result["inversion_stderr"]),
            "final_ratio": _final_truth(rig, result["setpoints"])["ratio"]}


def _memory_now() -> dict[str, float]:
    gc.collect()
    current, peak = tracemalloc.get_traced_memory()
    tracemalloc.reset_peak()
    rss_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    return {"traced_current_mib": current / 2**20, "traced_peak_mib": peak / 2**20,
            "max_rss_mib": rss_kib / 1024.0}


def _night_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """A calibration then back-to-back retunes until ``steps`` measurements, memory traced."""
    config: RunConfig = job["config"]
    scenario = job["scenario"]
    steps_wanted = int(job["steps"])
    tracemalloc.start()
    wall = time.perf_counter()
    rig = _local_rig(job["rig_config"], scenario["perturbation"], scenario["rig_seed"])
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
            ratios.append(_final_truth(rig, result["setpoints"])["ratio"])
            if rig.sim.clock >= next_thermal:
                rig.thermal_step(sign * THERMAL_STEP_HZ)
                sign, thermal_steps = -sign, thermal_steps + 1
                next_thermal += NIGHT_THERMAL_EVERY_S
            checkpoints.append({"steps": steps, "stages": k, "rig_clock_h": rig.sim.clock / 3600.0,
                                "wall_s": time.perf_counter() - wall, **_memory_now()})
    tracemalloc.stop()
    return {"scenario": scenario["index"], "steps": steps, "stages": stages,
            "thermal_steps": thermal_steps, "rig_clock_h": rig.sim.clock / 3600.0,
            "final_ratio_median": float(np.median(ratios)),
            "final_ratio_min": float(np.min(ratios)),
            "wall_time_s": time.perf_counter() - wall, "checkpoints": checkpoints}


def _run_job(job: Mapping[str, Any]) -> dict[str, Any]:
    kind = job["kind"]
    if kind == "calibration":
        return _calibration_job(job)
    if kind == "oracle":
        return _oracle_job(job)
    if kind == "night":
        return _night_job(job)
    raise ValueError(f"job kind: expected calibration, oracle or night, got {kind!r}")


# --------------------------------------------------------------------------------------------
# Optimiser overhead (this process, after the pool: a quiet machine)
# --------------------------------------------------------------------------------------------


def _measure_overhead(config: RunConfig, plan: StudyPlan, rig_config: str,
                      scenario: Mapping[str, Any], stderr: float) -> dict[str, Any]:
    """Wall time of ask + tell of the Bayesian strategy as told points grow.

    The landscape is the simulated rig's noiseless truth (frozen clock) plus Gaussian noise of
    standard deviation ``stderr`` (that of one search point).
    """
    rig = _local_rig(rig_config, scenario["perturbation"], scenario["rig_seed"])
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
        value = float(rig.truth(point)["inversion"]) + stderr * float(rng.standard_normal())
        t2 = time.perf_counter()
        strategy.tell(point, value, stderr)
        t3 = time.perf_counter()
        ask_s.append(t1 - t0)
        tell_s.append(t3 - t2)
    per_step_shots = _per_point_shots(config)
    rate = float(rig.describe().repetition_rate_hz)
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


def _summarise(records: Sequence[Mapping[str, Any]], stage: str) -> dict[str, Any]:
    rows = [r[stage] for r in records if stage in r and "skipped" not in r[stage]]
    shots = [r["shots_to_threshold"] for r in rows]
    rig_time = [r["rig_time_to_threshold_s"] for r in rows]
    return {
        "runs": len(rows),
        "failures": sum(not r["reached"] for r in rows),
        "shots_to_threshold_q": quantiles(shots),
        "rig_time_to_threshold_s_q": quantiles(rig_time),
        "final_ratio_q": quantiles([r["final_ratio"] for r in rows]),
        "stage_shots_q": quantiles([r["shots"] for r in rows]),
        "points_q": quantiles([r["points"] for r in rows]),
        "below_acceptance": sum(r["status"] == "below_acceptance" for r in rows),
    }


def _ratio(numerator: float, denominator: float) -> float:
    if math.isnan(numerator) or math.isnan(denominator):
        return math.nan
    if math.isinf(denominator):
        return 0.0 if not math.isinf(numerator) else math.nan
    if denominator == 0:
        return math.inf
    return numerator / denominator


def _targets(summary: Mapping[str, Any], oracle_shots: float, overhead: Mapping[str, Any] | None,
             night: Mapping[str, Any] | None) -> list[dict[str, Any]]:
    targets: list[dict[str, Any]] = []
    bayes = summary.get("bayesian")
    if bayes is not None:
        b_shots = bayes["shots_to_threshold_q"][1]
        b_quality = bayes["final_ratio_q"][1]
        for other, factor in (("coordinate", 5.0), ("grid", 20.0)):
            if other not in summary:
                continue
            o = summary[other]
            ratio = _ratio(o["shots_to_threshold_q"][1], b_shots)
            # "At equal final quality": the Bayesian search must not fail more often nor end
            # more than one percentage point lower in median true ratio.
            quality = b_quality >= o["final_ratio_q"][1] - 0.01 and \
                bayes["failures"] <= o["failures"]
            targets.append({
                "name": f"bayesian vs {other}: median shots to {THRESHOLD:.0%}",
                "target": f">= {factor:g}x fewer at equal final quality",
                "measured": (f"{ratio:.2f}x fewer" if math.isfinite(ratio) else
                             f"{other}'s median run never got there") +
                            f"; final ratio {b_quality:.3f} vs "
                            f"{o['final_ratio_q'][1]:.3f}; failures {bayes['failures']} vs "
                            f"{o['failures']}",
                "met": bool(ratio >= factor and quality),
            })
        ratio = _ratio(b_shots, oracle_shots)
        targets.append({"name": "bayesian vs oracle floor: median shots to threshold",
                        "target": "<= 20x the oracle floor", "measured": f"{ratio:.2f}x",
                        "met": bool(ratio <= 20.0)})
    if overhead is not None:
        worst = max(overhead["rows"], key=lambda r: r["fraction_of_step"])
        targets.append({
            "name": f"optimiser overhead up to {overhead['rows'][-1]['points']} points",
            "target": "<= 5% of one step's rig time",
            "measured": f"worst {worst['fraction_of_step']:.2%} at {worst['points']} points",
            "met": bool(worst["fraction_of_step"] <= 0.05),
        })
    if night is not None:
        targets.append({"name": f"memory over {night['steps']} steps of a simulated night",
                        "target": "flat (traced memory grows < 10% after warm-up)",
                        "measured": f"{night['growth_fraction']:+.1%} "
                                    f"({night['slope_kib_per_step']:+.2f} KiB/step)",
                        "met": bool(night["growth_fraction"] < 0.10)})
    return targets


def _night_growth(night: dict[str, Any]) -> dict[str, Any]:
    points = night["checkpoints"]
    # Warm-up: the first calibration and the first quarter of the night fill caches once.
    start = points[min(len(points) - 1, max(1, len(points) // 4))]
    end = points[-1]
    tail = [p for p in points if p["steps"] >= start["steps"]]
    if len({p["steps"] for p in tail}) >= 2:
        slope = float(np.polyfit([p["steps"] for p in tail],
                                 [p["traced_current_mib"] * 1024.0 for p in tail], 1)[0])
    else:
        slope = 0.0
    night["growth_fraction"] = end["traced_current_mib"] / start["traced_current_mib"] - 1.0
    night["slope_kib_per_step"] = slope
    night["warm_checkpoint"] = start
    night["peak_traced_mib"] = max(p["traced_peak_mib"] for p in points)
    night["max_rss_mib"] = max(p["max_rss_mib"] for p in points)
    return night


# --------------------------------------------------------------------------------------------
# The study
# --------------------------------------------------------------------------------------------


def run_study(plan: StudyPlan, *, config_path: Path = DEFAULT_RUN_CONFIG,
              rig_config_path: Path = DEFAULT_RIG_CONFIG,
              progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Run the whole study of ``plan`` and return its JSON-ready result.

    Parameters
    ----------
    plan : StudyPlan
        Sizes (see :func:`plan_for`).
    config_path : Path
        The calibrate/retune TOML (default ``configs/dry-run.toml``).
    rig_config_path : Path
        The demo simulated rig TOML (default ``configs/sim-rig.toml``).
    progress : callable, optional
        Called with a short line as jobs finish.
    """
    wall = time.perf_counter()
    base = _base_config(plan, config_path)
    configs = strategy_configs(base, plan)
    scenarios = make_scenarios(plan.scenarios, plan.seed)
    rig_config = str(rig_config_path)
    jobs: list[dict[str, Any]] = []
    if plan.night_steps > 0:
        # The longest job first, so that it overlaps all the others.
        jobs.append({"kind": "night", "config": configs.get("bayesian", base),
                     "scenario": scenarios[0], "steps": plan.night_steps,
                     "rig_config": rig_config})
    for scenario in scenarios:
        for kind in plan.strategies:
            jobs.append({"kind": "calibration", "config": configs[kind], "scenario": scenario,
                         "rig_config": rig_config,
                         "retune": plan.retune and kind == "bayesian"})
        jobs.append({"kind": "oracle", "config": base, "scenario": scenario,
                     "rig_config": rig_config})
    results = _map(jobs, plan.workers, progress)
    night = next((r for r in results if "checkpoints" in r), None)
    calibrations = [r for r in results if "calibrate" in r]
    oracles = [r for r in results if "verification_shots" in r]

    overhead = None
    if plan.overhead_points and "bayesian" in configs:
        if progress:
            progress("optimiser overhead ...")
        # One search point's standard error: the oracle's measured verification error scaled
        # by sqrt(shots ratio) (binomial errors go as 1/sqrt(shots), common practice).
        m = base.measurement
        stderr = float(np.median([o["verified_stderr"] for o in oracles])) * math.sqrt(
            m.verification_shots_per_phase / m.shots_per_phase)
        overhead = _measure_overhead(configs["bayesian"], plan, rig_config, scenarios[0], stderr)

    summary = {kind: _summarise([r for r in calibrations if r["strategy"] == kind], "calibrate")
               for kind in plan.strategies}
    oracle_shots = float(np.median([o["verification_shots"] for o in oracles]))
    oracle = {"shots": oracle_shots,
              "verified_stderr_median": float(np.median([o["verified_stderr"] for o in oracles])),
              "final_ratio_median": float(np.median([o["final_ratio"] for o in oracles])),
              "runs": oracles}
    for kind, s in summary.items():
        s["shots_to_threshold_over_oracle"] = _ratio(s["shots_to_threshold_q"][1], oracle_shots)
        s["stage_shots_over_oracle"] = _ratio(s["stage_shots_q"][1], oracle_shots)
        s["verified_stderr_median"] = float(np.median(
            [r["calibrate"]["verified_stderr"] for r in calibrations if r["strategy"] == kind]))
    retune = None
    bayes_runs = [r for r in calibrations if r["strategy"] == "bayesian" and "retune" in r]
    if bayes_runs:
        done = [r for r in bayes_runs if "skipped" not in r["retune"]]
        shot_ratios = [r["retune"]["shots"] / r["calibrate"]["shots"] for r in done]
        retune = {
            "thermal_step_hz": THERMAL_STEP_HZ, "runs": len(bayes_runs),
            "skipped": len(bayes_runs) - len(done),
            **_summarise(done, "retune"),
            "shots_over_calibration_q": quantiles(shot_ratios),
            "ratio_after_step_q": quantiles([r["retune"]["ratio_after_step"] for r in done]),
            "still_good": sum(r["retune"]["status"] == "still_good" for r in done),
        }
    if night is not None:
        night = _night_growth(night)
    targets = _targets(summary, oracle_shots, overhead, night)
    return {
        "study": "autotune benchmark (issue 5)", "mode": plan.mode,
        "simulated": True, "threshold": THRESHOLD,
        "command": "python -m autotune.bench" + {"full": "", "quick": " --quick",
                                                 "tiny": " --tiny"}[plan.mode],
        "wall_time_s": time.perf_counter() - wall,
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "platform": platform.platform(), "workers": plan.workers},
        "plan": _jsonable(dataclasses.asdict(plan)),
        "code": _provenance(),
        "search_configs": {kind: _jsonable(dataclasses.asdict(cfg.search))
                           for kind, cfg in configs.items()},
        "config": str(config_path), "rig_config": str(rig_config_path),
        "scenario_ranges": {f"{s}.{k}": list(v) for (s, k), v in SCENARIO_RANGES.items()},
        "scenarios": scenarios,
        "strategies": {kind: _settings_of(cfg) for kind, cfg in configs.items()},
        "summary": summary, "oracle": oracle, "overhead": overhead, "night": night,
        "retune": retune, "targets": targets,
        "runs": sorted(calibrations, key=lambda r: (r["scenario"], r["strategy"])),
    }


def _map(jobs: list[dict[str, Any]], workers: int,
         progress: Callable[[str], None] | None) -> list[dict[str, Any]]:
    def note(result: Mapping[str, Any]) -> None:
        if progress is None:
            return
        if "checkpoints" in result:
            progress(f"night: {result['steps']} steps in {result['wall_time_s']:.0f} s")
        elif "calibrate" in result:
            c = result["calibrate"]
            progress(f"scenario {result['scenario']:2d} {result['strategy']:<10} "
                     f"{c['points']:3d} points, to {THRESHOLD:.0%}: "
                     f"{c['shots_to_threshold'] or 'never'} shots, final {c['final_ratio']:.3f}, "
                     f"{c['wall_time_s']:.0f} s")
    if workers <= 1:
        results = []
        for job in jobs:
            results.append(_run_job(job))
            note(results[-1])
        return results
    # Spawned workers start clean (no inherited locks or thread pools); one BLAS thread each,
    # so two workers do not fight over two cores.
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(var, "1")
    context = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=workers, mp_context=context,
                             initializer=_quiet_logging) as pool:
        futures = [pool.submit(_run_job, job) for job in jobs]
        results = []
        for future in futures:
            results.append(future.result())
            note(results[-1])
    return results


def _provenance() -> dict[str, Any]:
    """The commit and the modified tracked files of the working tree (results depend on both)."""
    def git(*args: str) -> str:
        try:
            done = subprocess.run(["git", "-C", str(REPO), *args], capture_output=True,
                                  text=True, timeout=10, check=False)
        except (OSError, subprocess.TimeoutExpired):
            return ""
        return done.stdout.rstrip() if done.returncode == 0 else ""
    modified = [line[3:] for line in git("status", "--porcelain", "--untracked-files=no")
                .splitlines() if line]
    return {"commit": git("rev-parse", "HEAD") or None, "modified_files": modified}


def _jsonable(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else ("inf" if value > 0 else "-inf")
    return value


# --------------------------------------------------------------------------------------------
# Table
# --------------------------------------------------------------------------------------------


def _num(value: float | str | None, digits: int = 0, scale: float = 1.0) -> str:
    # A result read back from its file carries infinities as "inf" (see write_result).
    if isinstance(value, str):
        value = float(value)
    if value is None or math.isnan(value):
        return "n/a"
    if math.isinf(value):
        return "never"
    return f"{value / scale:,.{digits}f}"


def _q(values: Sequence[float], digits: int = 0, scale: float = 1.0) -> str:
    return f"{_num(values[1], digits, scale)} [{_num(values[0], digits, scale)}-" \
           f"{_num(values[2], digits, scale)}]"


def format_table(study: Mapping[str, Any]) -> str:
    """The printed report of a study result (as returned by :func:`run_study`)."""
    lines = []
    s = study["summary"]
    n = study["plan"]["scenarios"]
    lines.append(f"autotune benchmark ({study['mode']} mode, SIMULATED rig, {n} scenarios, "
                 f"wall {study['wall_time_s']:.0f} s, {study['machine']['workers']} workers)")
    lines.append("command: " + study["command"])
    code = study.get("code") or {}
    lines.append(f"code: commit {str(code.get('commit'))[:10]}" + (
        ", with uncommitted changes to " + ", ".join(code["modified_files"])
        if code.get("modified_files") else ""))
    lines.append("scenarios: uniform draws from the demo rig over " + ", ".join(
        f"{k} [{lo:g}, {hi:g}]" for k, (lo, hi) in study["scenario_ranges"].items()))
    lines.append("")
    lines.append("strategy settings (same fringe measurement per point for all):")
    for kind, settings in study["strategies"].items():
        lines.append(f"  {kind:<10} " + ", ".join(f"{k}={v}" for k, v in settings.items()))
    lines.append("  (grid, coordinate and random get max_points/max_shots raised to finish "
                 "their design; the Bayesian search keeps the configured budget)")
    lines.append("")
    lines.append(f"1. shots to calibrate: until the true inversion at the recommendation first "
                 f"reaches {THRESHOLD:.0%} of the true best; median [quartiles]; 'never' = a "
                 f"failure counted as infinite")
    header = (f"  {'strategy':<10} {'shots to 98%':>28} {'rig time to 98% (h)':>24} "
              f"{'failures':>8} {'final true ratio':>24} {'stage shots':>30} {'x oracle':>9}")
    lines.append(header)
    for kind, row in s.items():
        lines.append(
            f"  {kind:<10} {_q(row['shots_to_threshold_q']):>28} "
            f"{_q(row['rig_time_to_threshold_s_q'], 2, 3600.0):>24} "
            f"{row['failures']:>3}/{row['runs']:<4} {_q(row['final_ratio_q'], 3):>24} "
            f"{_q(row['stage_shots_q']):>30} {_num(row['shots_to_threshold_over_oracle'], 1):>9}")
    o = study["oracle"]
    lines.append("")
    lines.append(f"2. oracle floor: verification alone at the true best = {o['shots']:,.0f} shots "
                 f"(verified stderr median {o['verified_stderr_median']:.4f}; strategies' "
                 "verification stderr " + ", ".join(
                     f"{k} {row['verified_stderr_median']:.4f}" for k, row in s.items()) + ")")
    lines.append("   median shots / floor: " + ", ".join(
        f"{k} to 98% {_num(row['shots_to_threshold_over_oracle'], 1)}x, whole stage "
        f"{_num(row['stage_shots_over_oracle'], 1)}x" for k, row in s.items()))
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
        lines.append(f"4. long run: calibration + {night['stages']['retune']} back-to-back retunes "
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
    r = study.get("retune")
    if r:
        lines.append("")
        lines.append(f"5. retune after a {r['thermal_step_hz'] / 1e3:g} kHz thermal step "
                     f"({r['runs'] - r['skipped']} of {r['runs']} scenarios; "
                     f"{r['still_good']} judged still good): true ratio after the step "
                     f"{_q(r['ratio_after_step_q'], 3)}; retune shots {_q(r['stage_shots_q'])} = "
                     f"{_q(r['shots_over_calibration_q'], 2)} x the calibration's; to 98%: "
                     f"{_q(r['shots_to_threshold_q'])} shots, failures {r['failures']}; final "
                     f"true ratio {_q(r['final_ratio_q'], 3)}")
    lines.append("")
    lines.append("targets (ratios from this one run):")
    for t in study["targets"]:
        lines.append(f"  [{'met' if t['met'] else 'MISSED'}] {t['name']}: target {t['target']}; "
                     f"measured {t['measured']}")
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------
# Command
# --------------------------------------------------------------------------------------------


def write_result(study: Mapping[str, Any], path: Path) -> None:
    """Write ``study`` as strict JSON (infinities as the strings "inf"/"-inf", NaN as null)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(_jsonable(study), indent=1, allow_nan=False) + "\n",
                    encoding="utf-8")


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m autotune.bench [--quick | --tiny] [--out PATH] ...``; returns the exit code."""
    parser = argparse.ArgumentParser(
        prog="python -m autotune.bench",
        description="Benchmark study on the bundled SIMULATED rig: shots to calibrate per "
                    "strategy, the oracle floor, optimiser overhead, a night's memory, retune.")
    size = parser.add_mutually_exclusive_group()
    size.add_argument("--quick", action="store_true", help="fewer scenarios, shorter night")
    size.add_argument("--tiny", action="store_true", help="smoke-test sizes (seconds)")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT,
                        help=f"JSON result file (default {DEFAULT_OUT.relative_to(REPO)})")
    parser.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    parser.add_argument("--scenarios", type=int, help="number of scenarios (default by mode)")
    parser.add_argument("--seed", type=int, help="seed of the scenario draw")
    parser.add_argument("--config", type=Path, default=DEFAULT_RUN_CONFIG,
                        help="calibrate/retune TOML (default configs/dry-run.toml)")
    parser.add_argument("--rig-config", type=Path, default=DEFAULT_RIG_CONFIG,
                        help="demo simulated rig TOML (default configs/sim-rig.toml)")
    size.add_argument("--show", type=Path, metavar="RESULT_JSON",
                      help="print the table of a result file written earlier; run nothing")
    ns = parser.parse_args(argv)
    if ns.show is not None:
        try:
            study = json.loads(ns.show.read_text(encoding="utf-8"))
            print(format_table(study))
        except (OSError, ValueError, KeyError, TypeError) as exc:
            print(f"error: cannot show {ns.show}: {type(exc).__name__}: {exc}", file=sys.stderr)
            return 2
        return 0
    # The bench is a command: it configures logging (warnings only) like autotune/cli.py.
    logging.basicConfig(level=logging.WARNING)
    _quiet_logging()
    mode = "quick" if ns.quick else "tiny" if ns.tiny else "full"
    try:
        plan = plan_for(mode, workers=ns.workers, scenarios=ns.scenarios, seed=ns.seed)
    except ValueError as exc:
        parser.error(str(exc))
    study = run_study(plan, config_path=ns.config, rig_config_path=ns.rig_config,
                      progress=lambda line: print(line, file=sys.stderr, flush=True))
    write_result(study, ns.out)
    print(format_table(study))
    print(f"\nwritten: {ns.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
