"""The benchmark study: what a user pays to calibrate, the oracle floor, overhead, a night's memory.

Run ``python -m autotune.bench`` (full study), ``--quick`` (a few minutes) or ``--tiny`` (the
smoke test's sizes). It writes a JSON file (``--out``, default
``benchmarks/results/latest.json``) and prints a table. Every figure is measured on the bundled
SIMULATED rig (:class:`autotune.server.LocalRig`: the real protocol's encoder, server handler
and parsers without a socket). This module is a study on the simulated rig, like the dry run,
so it is one of the few places in ``autotune`` that imports ``drivers_sim``; it does so lazily,
inside the functions that build rigs and jobs, so importing ``autotune`` never pulls it in (nor
dask, imported only when a run uses it).

Scenario families
-----------------
Scenarios are drawn by seeded random perturbation of the demo rig (``configs/sim-rig.toml``),
never picked by hand, in three families reported separately (:data:`FAMILIES`):

- ``main``: uniform over :data:`SCENARIO_RANGES` from the plan's seed;
- ``held_out``: the same ranges from :data:`HELD_OUT_SEED`, fixed here and never used to tune;
- ``mismatch``: physics that a method built on the Gaussian mode and a linear Stark map does
  not assume: a non-Gaussian mode profile (super-Gaussian or asymmetric, equally likely, its
  parameter drawn from :data:`MISMATCH_PROFILES`), a hidden Stark-coefficient error up to
  +-15 % and a stray electrode field, plus the main ranges (:data:`MISMATCH_RANGES`), from
  :data:`MISMATCH_SEED`.

Sections of the study
---------------------
1. What a user pays, per family and strategy: the whole stage's shots (search, the final
   detuning scan and the verification) until the stage ends by its own rule, as a multiple of
   the oracle floor; the final true ratio (true inversion at the verified set-points over the
   true best at that moment); the scenarios that end below 98 % and below 97 % of the true best.
   Secondary: the shots until the recommendation first reaches ``THRESHOLD`` of the true best
   (a failure counts as infinitely many shots in the quantiles, "never" in the table).
2. Oracle floor: the shots of the final verification alone, measured at the true best
   set-points (a one-point run whose box is the true best), so its precision equals that of
   every strategy's verification.
3. Optimiser overhead: wall time of the Bayesian strategy's ``ask`` plus ``tell`` as the told
   points grow, against the rig time of one step at the rig's repetition rate.
4. A long run: a calibration, then back-to-back retunes (drift on, a thermal step every two rig
   hours, alternating sign) for several hundred steps; traced (tracemalloc) and resident
   (getrusage) memory at checkpoints.
5. Retune: after each calibration of the strategies in ``retune_strategies``, a 15 kHz thermal
   step and a retune; its whole stage against the oracle floor, its final true ratio, and the
   checks that judged a moved peak still good (the true ratio at the old set-points right
   after the step below ``THRESHOLD`` while the check passed).

The targets (issues 5 and 10) are printed beside the measured ratios with "met" or "MISSED";
those of the guided strategy :data:`GUIDED` say "not run" when it is not in the run.

Running the scenarios
---------------------
Jobs are plain JSON (the configuration's parsed TOML, the rig's checked configuration as a
dict, the scenario) and so are their results, so a job gives the same result wherever it runs:
in this process (``--serial`` or ``--workers 1``), on a local dask.distributed cluster of
``--workers`` processes (the default, 2), or on an existing cluster (``--scheduler ADDRESS``).
Every job runs with one BLAS thread. dask's own messages between its processes use pickle:
give ``--scheduler`` only a cluster on a network you trust.
"""

from __future__ import annotations

import argparse
import contextlib
import copy
import dataclasses
import gc
import importlib.metadata as metadata
import json
import logging
import math
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
import tracemalloc
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any, get_args

import numpy as np
import structlog

from autotune.run import runner
from autotune.config import (
    LockConfig,
    MeasurementConfig,
    RetuneConfig,
    RunConfig,
    SearchConfig,
    StrategyKind,
    TrackConfig,
    config_from_dict,
    load_config,
    packaged_config,
)
from autotune.run.loop import build_strategy, search_space
from autotune.progress import format_duration

__all__ = [
    "THRESHOLD",
    "LOWER_THRESHOLD",
    "SCENARIO_RANGES",
    "MISMATCH_RANGES",
    "MISMATCH_PROFILES",
    "HELD_OUT_SEED",
    "MISMATCH_SEED",
    "FAMILIES",
    "STRATEGIES",
    "GUIDED",
    "RETUNE_STRATEGIES",
    "ScenarioFamily",
    "StudyPlan",
    "plan_for",
    "check_plan",
    "make_scenarios",
    "family_seed",
    "family_scenarios",
    "run_job",
    "strategy_configs",
    "quantiles",
    "run_study",
    "format_table",
    "write_result",
    "main",
]

REPO = Path(__file__).resolve().parents[1]
DEFAULT_RUN_CONFIG = packaged_config("dry-run.toml")
DEFAULT_RIG_CONFIG = packaged_config("sim-rig.toml")
DEFAULT_OUT = REPO / "benchmarks" / "results" / "latest.json"

#: Fraction of the true best inversion that counts as "calibrated".
THRESHOLD = 0.98
#: The looser bar that every scenario must clear (issue 10).
LOWER_THRESHOLD = 0.97

#: The strategies compared; every name must be a ``[search] strategy`` the loop knows.
STRATEGIES: tuple[str, ...] = ("phase_lock", "bayesian", "coordinate", "grid", "random")
#: The physics-guided strategy that the issue-10 targets are about.
GUIDED = "phase_lock"
#: Strategies whose calibrations are followed by a thermal step and a retune (when in the run).
RETUNE_STRATEGIES: tuple[str, ...] = ("bayesian", GUIDED)

#: Uniform ranges of the main scenario draw: (section, key) -> (low, high), SI units.
#: The demo values (docs/physics.md section 6) lie inside every range.
SCENARIO_RANGES: dict[tuple[str, str], tuple[float, float]] = {
    ("beam", "velocity_bias_m_per_s"): (-15.0, 15.0),
    ("cavity", "coupling_hz"): (46e3, 52e3),
    ("cavity", "initial_offset_hz"): (-20e3, 20e3),
    ("stark", "coefficient_error"): (-0.03, 0.03),
    # 4 kHz per hour is 1.11 Hz/s; the range spans -8 .. +8 kHz per hour.
    ("drift", "ramp_hz_per_s"): (-2.2, 2.2),
    ("drift", "random_walk_hz_per_sqrt_s"): (5.0, 20.0),
}

#: Seed of the held-out draw (same ranges as the main draw); fixed here, never used to tune.
HELD_OUT_SEED = 20270419
#: Seed of the mismatch draw.
MISMATCH_SEED = 20270523

#: Ranges of the mismatch draw: the main ranges with a Stark-coefficient error up to +-15 % and
#: a stray electrode field (+-1 V/m moves set-point 0 by about -+7.5 kHz and bends the
#: set-point -> detuning map).
MISMATCH_RANGES: dict[tuple[str, str], tuple[float, float]] = {
    **SCENARIO_RANGES,
    ("stark", "coefficient_error"): (-0.15, 0.15),
    ("stark", "bias_field_error_v_per_m"): (-1.0, 1.0),
}

#: Mode profiles of the mismatch draw, equally likely: profile -> ([cavity] key, its range).
#: Orders above 5 would put the 2 pi velocity of the fastest couplings beyond the search box.
MISMATCH_PROFILES: dict[str, tuple[str, tuple[float, float]]] = {
    "super_gaussian": ("super_gaussian_order", (2.5, 5.0)),
    "asymmetric": ("waist_asymmetry", (-0.3, 0.3)),
}


#: Seeds of the velocity-physics draw and of its held-out twin (issue 18): fixed here, never
#: used to tune.
VELOCITY_PHYSICS_SEED = 20270611
VELOCITY_PHYSICS_HELD_OUT_SEED = 20270707

#: Ranges of the velocity-physics draw: what makes the inversion depend on velocity (a long
#: Ramsey arm, a large Ramsey detuning, a wide velocity class: the fringe phase
#: 2 pi Delta_R L / v is spread by about 2 pi Delta_R L sigma_v / v^2, docs/physics.md section 3) and
#: what degrades the signal, plus the main ranges. Where each range comes from:
#: zone separation 3-12 cm and Ramsey detuning 5-40 kHz (from memory: Ramsey zones a few cm to
#: ~10 cm apart, fringes scanned over tens of kHz; at the corner 40 kHz, 12 cm, 6 m/s the
#: dephasing is 0.7 rad at 500 m/s, an empty contrast of about 0.77); velocity spread 1-6 m/s
#: (docs/physics.md section 4: a few m/s, from memory); one-photon probability 0.55-0.95 (from
#: memory; a poor source near 0.6 is the issue's case); mode temperature 0.3-1.2 K (n_th a few
#: hundredths to about 0.2 at 48.6 GHz, docs/physics.md section 4); atoms per sample 0.08-0.4 (a
#: small Poisson mean, two-atom samples rare, docs/physics.md section 4); detection efficiency
#: 0.3-0.8 (tens of percent, from memory).
VELOCITY_PHYSICS_RANGES: dict[tuple[str, str], tuple[float, float]] = {
    **SCENARIO_RANGES,
    ("ramsey", "zone_separation_m"): (0.03, 0.12),
    ("ramsey", "detuning_hz"): (5e3, 40e3),
    ("beam", "velocity_spread_m_per_s"): (1.0, 6.0),
    ("field", "one_photon_probability"): (0.55, 0.95),
    ("cavity", "temperature_k"): (0.3, 1.2),
    ("rig", "atoms_per_sample"): (0.08, 0.4),
    ("detection", "efficiency"): (0.3, 0.8),
}


@dataclasses.dataclass(frozen=True)
class ScenarioFamily:
    """One way of drawing scenarios.

    Attributes
    ----------
    name : str
        ``"main"``, ``"held_out"`` or ``"mismatch"``.
    seed : int or None
        Seed of the draw; ``None`` takes the plan's seed (the main draw).
    ranges : Mapping
        ``(section, key) -> (low, high)`` of the uniform draws, SI units.
    profiles : Mapping
        Mode profiles drawn with equal probability: ``profile -> ([cavity] key, (low, high))``;
        empty keeps the demo's Gaussian mode.
    summary : str
        One line for the table.
    """

    name: str
    seed: int | None
    ranges: Mapping[tuple[str, str], tuple[float, float]]
    profiles: Mapping[str, tuple[str, tuple[float, float]]] = dataclasses.field(
        default_factory=dict)
    summary: str = ""


FAMILIES: dict[str, ScenarioFamily] = {
    "main": ScenarioFamily("main", None, SCENARIO_RANGES,
                           summary="uniform draws from the demo rig"),
    "held_out": ScenarioFamily("held_out", HELD_OUT_SEED, SCENARIO_RANGES,
                               summary="the main ranges, another seed (fixed, never tuned on)"),
    "mismatch": ScenarioFamily("mismatch", MISMATCH_SEED, MISMATCH_RANGES, MISMATCH_PROFILES,
                               summary="physics the guided strategy does not assume"),
    "velocity_physics": ScenarioFamily(
        "velocity_physics", VELOCITY_PHYSICS_SEED, VELOCITY_PHYSICS_RANGES,
        summary="Ramsey arm and detuning, velocity spread, source, temperature, atoms, detector"),
    "velocity_physics_held_out": ScenarioFamily(
        "velocity_physics_held_out", VELOCITY_PHYSICS_HELD_OUT_SEED, VELOCITY_PHYSICS_RANGES,
        summary="the velocity-physics ranges, another seed (fixed, never tuned on)"),
}

#: The thermal step before each scenario's retune, Hz (docs/physics.md section 6).
THERMAL_STEP_HZ = 15e3

#: Rig time between thermal steps of the long run, s.
NIGHT_THERMAL_EVERY_S = 7200.0

#: The night study (``--night``): hours of rig time per night, thermal steps per night, the
#: schedules of today's retune it is compared with (s between retunes), the grid of the truth.
NIGHT_HOURS = 8.0
NIGHT_THERMAL_STEPS = 2
NIGHT_SCHEDULES_S: tuple[float, ...] = (1800.0, 7200.0)
NIGHT_GRID_S = 60.0

#: Bounds of the waits on a dask cluster, s: its workers' start, a client's connection.
CLUSTER_START_TIMEOUT_S = 120.0
CLUSTER_CLOSE_TIMEOUT_S = 30.0
#: Default bound of the whole set of jobs, s (``--timeout-s``).
DEFAULT_TIMEOUT_S = 6 * 3600.0

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
        Number of seeded scenarios of each family.
    seed : int
        Seed of the main draw (the other families have their own, :data:`FAMILIES`).
    families : tuple of str
        Scenario families run, among :data:`FAMILIES`.
    strategies : tuple of str
        Strategies compared.
    retune_strategies : tuple of str
        Strategies whose calibrations are followed by a thermal step and a retune (those of
        them that are in ``strategies``).
    night_steps : int
        Measurements (points, checks, verifications) of the long run (0: none).
    overhead_points : tuple of int
        Told points at which the optimiser overhead is reported (empty: not measured).
    overhead_window : int
        Steps averaged (median) before each checkpoint.
    retune : bool
        Run the thermal step and the retunes at all.
    workers : int
        Processes of the local cluster (1: everything in this process, no dask).
    timeout_s : float
        Bound of the whole set of jobs on a cluster, s.
    measurement : Mapping
        Overrides of ``[measurement]`` shared by all strategies (empty: the config's).
    search : Mapping
        Overrides of ``[search]`` of the strategies that keep the configured budget.
    retune_settings : Mapping
        Overrides of ``[retune]`` (empty: the config's).
    grid_points_per_dimension, coordinate_points_per_dimension, coordinate_rounds : int
        The hand strategies' designs.
    calibration_study : bool
        Run sections 1 to 5 (False with ``--night``: the night study alone).
    night_study : bool
        Run section 6, the night study.
    night_scenarios : int
        Scenarios of each family in the night study.
    night_hours : float
        Rig hours of each night.
    night_families : tuple of str
        Scenario families of the night study (default: every family of :data:`FAMILIES`,
        read when the plan is made, so that a family added there is studied too).
    night_schedules : bool
        Hold each night with today's retune schedules too, for comparison (False: ``track``
        and its quiet night only, a shorter run).
    """

    mode: str
    scenarios: int
    seed: int = 20261205
    families: tuple[str, ...] = tuple(FAMILIES)
    strategies: tuple[str, ...] = STRATEGIES
    retune_strategies: tuple[str, ...] = RETUNE_STRATEGIES
    night_steps: int = 400
    overhead_points: tuple[int, ...] = (10, 25, 50, 100, 150, 200)
    overhead_window: int = 5
    retune: bool = True
    workers: int = 2
    timeout_s: float = DEFAULT_TIMEOUT_S
    measurement: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    search: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    retune_settings: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    grid_points_per_dimension: int = 9
    coordinate_points_per_dimension: int = 9
    coordinate_rounds: int = 3
    calibration_study: bool = True
    night_study: bool = True
    night_scenarios: int = 10
    night_hours: float = NIGHT_HOURS
    night_families: tuple[str, ...] = dataclasses.field(default_factory=lambda: tuple(FAMILIES))
    night_schedules: bool = True


def plan_for(mode: str, *, workers: int = 2, scenarios: int | None = None,
             seed: int | None = None, strategies: Sequence[str] | None = None,
             night_only: bool = False) -> StudyPlan:
    """The plan of a named mode: ``"full"``, ``"quick"`` or ``"tiny"``.

    Full and quick use the demo measurement and budgets unchanged (quick has fewer scenarios, a
    shorter night); tiny shrinks every size so that the smoke test runs in seconds.

    Raises
    ------
    ValueError
        An unknown mode, fewer than one scenario or worker, or a strategy the loop does not
        know (the names of :data:`autotune.config.StrategyKind`).
    """
    if mode == "full":
        plan = StudyPlan("full", scenarios=20, workers=workers)
    elif mode == "quick":
        # The overhead study stops at 100 points: the steps beyond cost most of its time.
        plan = StudyPlan("quick", scenarios=3, night_steps=100,
                         overhead_points=(10, 25, 50, 100), overhead_window=3, workers=workers,
                         night_scenarios=3)
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
            night_scenarios=1, night_hours=1.5, night_families=("main",),
        )
    else:
        raise ValueError(f"mode: expected 'full', 'quick' or 'tiny', got {mode!r}")
    changes: dict[str, Any] = {}
    if scenarios is not None:
        if scenarios < 1:
            raise ValueError(f"scenarios: expected an integer >= 1, got {scenarios!r}")
        changes["scenarios"] = scenarios
    if workers < 1:
        raise ValueError(f"workers: expected an integer >= 1, got {workers!r}")
    if seed is not None:
        changes["seed"] = seed
    if strategies is not None:
        changes["strategies"] = tuple(strategies)
    if night_only:
        changes.update(calibration_study=False, night_study=True)
        if scenarios is not None:
            changes["night_scenarios"] = scenarios
    plan = dataclasses.replace(plan, **changes)
    check_plan(plan)
    return plan


def check_plan(plan: StudyPlan) -> None:
    """Refuse a plan naming a strategy or family that does not exist, before anything runs."""
    known = get_args(StrategyKind)
    for name in plan.strategies:
        if name not in known:
            raise ValueError(f"strategies: expected names among {list(known)} "
                             f"(autotune.config.StrategyKind), got {name!r}")
    if not plan.strategies:
        raise ValueError("strategies: expected at least one strategy, got none")
    for name in (*plan.families, *plan.night_families):
        if name not in FAMILIES:
            raise ValueError(f"families: expected names among {list(FAMILIES)}, got {name!r}")
    if not plan.families:
        raise ValueError("families: expected at least one family, got none")
    if not (plan.calibration_study or plan.night_study):
        raise ValueError("plan: expected the calibration study, the night study or both")
    if plan.night_study and (plan.night_scenarios < 1 or not plan.night_hours > 0
                             or not plan.night_families):
        raise ValueError(f"night study: expected scenarios >= 1, hours > 0 and a family, got "
                         f"{plan.night_scenarios}, {plan.night_hours}, {plan.night_families}")


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

    The grid gets ``n x n`` points, the coordinate scan ``n x 2 x rounds`` points, and random
    search as many points as the configured budget; their shot and rig-time budgets are raised
    to fit those points. Every other strategy (the Bayesian search, the guided one) keeps the
    configured budget.
    """
    per_point = _per_point_shots(base)
    s = base.search
    dims = len(base.setpoints)
    designs = {
        "grid": plan.grid_points_per_dimension ** dims,
        "coordinate": plan.coordinate_points_per_dimension * dims * plan.coordinate_rounds,
        "random": s.max_points,
    }
    out = {}
    for kind in plan.strategies:
        points = designs.get(kind)
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
    if s.strategy == "grid":
        settings["points_per_dimension"] = s.grid_points_per_dimension
    elif s.strategy == "coordinate":
        settings.update(points_per_dimension=s.coordinate_points_per_dimension,
                        rounds=s.coordinate_rounds)
    elif s.strategy == "random":
        settings["n_points"] = s.max_points
    elif s.strategy == "phase_lock":
        lock = config.lock
        settings.update(target_shortfall=lock.target_shortfall,
                        lock_shots_per_phase=lock.lock_shots_per_phase,
                        velocity_shots_per_phase=lock.velocity_shots_per_phase,
                        bracket_step_hz=lock.bracket_step_hz,
                        max_corrections=lock.max_corrections)
    else:
        settings.update(n_initial_points=s.n_initial_points, min_points=s.min_points)
        if s.strategy == "bayesian":
            settings["exploration"] = s.exploration
    return settings


# --------------------------------------------------------------------------------------------
# Scenarios
# --------------------------------------------------------------------------------------------


def make_scenarios(count: int, seed: int, family: ScenarioFamily | None = None
                   ) -> list[dict[str, Any]]:
    """``count`` scenarios of ``family`` (default the main one) drawn from ``seed``.

    Each scenario is ``{"family", "index", "rig_seed", "search_seed", "perturbation":
    {section: {key: value}}}``; scenario ``k`` depends only on ``seed``, ``k`` and the family's
    ranges. The uniform ranges are drawn first, then the two seeds, then the mode profile (so
    a family without profiles draws exactly what the main draw always drew).
    """
    family = family or FAMILIES["main"]
    scenarios = []
    for k in range(count):
        rng = np.random.default_rng(np.random.SeedSequence([seed, k]))
        perturbation: dict[str, dict[str, Any]] = {}
        for (section, key), (low, high) in family.ranges.items():
            perturbation.setdefault(section, {})[key] = float(rng.uniform(low, high))
        rig_seed, search_seed = (int(x) for x in rng.integers(0, 2**31 - 1, size=2))
        if family.profiles:
            names = list(family.profiles)
            profile = names[int(rng.integers(0, len(names)))]
            key, (low, high) = family.profiles[profile]
            perturbation.setdefault("cavity", {}).update(
                {"mode_profile": profile, key: float(rng.uniform(low, high))})
        scenarios.append({"family": family.name, "index": k, "rig_seed": rig_seed,
                          "search_seed": search_seed, "perturbation": perturbation})
    return scenarios


def family_seed(plan: StudyPlan, name: str) -> int:
    """The seed of a family's draw in ``plan`` (the main draw takes the plan's seed)."""
    seed = FAMILIES[name].seed
    return plan.seed if seed is None else seed


def family_scenarios(plan: StudyPlan) -> dict[str, list[dict[str, Any]]]:
    """The scenarios of every family of ``plan``, by family name."""
    return {name: make_scenarios(plan.scenarios, family_seed(plan, name), FAMILIES[name])
            for name in plan.families}


def _rig_data(rig_config_path: Path) -> dict[str, Any]:
    # A study on the simulated rig: drivers_sim is imported here and in _local_rig only.
    from drivers_sim.config import load_sim_config

    return {"source": str(rig_config_path), "data": load_sim_config(rig_config_path).to_dict()}


def _local_rig(rig: Mapping[str, Any], perturbation: Mapping[str, Mapping[str, Any]],
               seed: int) -> Any:
    # A study on the simulated rig: drivers_sim is imported here only (see the module docstring).
    from autotune.kit.server import LocalRig
    from drivers_sim.config import sim_config_from_dict
    from drivers_sim.driver import SimulatedDriver
    from drivers_sim.rig import SimulatedRig

    data = copy.deepcopy(dict(rig["data"]))
    for section, values in perturbation.items():
        data[section].update(values)
    sim = sim_config_from_dict(data, source=f"<{rig['source']} perturbed>")
    return LocalRig(SimulatedDriver(SimulatedRig(sim, seed=seed)))


# --------------------------------------------------------------------------------------------
# Jobs (plain JSON in and out; run in this process or on a dask worker)
# --------------------------------------------------------------------------------------------


def _config_spec(config: RunConfig) -> dict[str, Any]:
    """A configuration as plain data: the parsed TOML plus the sections the study changed."""
    retune = dataclasses.asdict(config.retune)
    retune["half_widths"] = dict(config.retune.half_widths)
    return {"source": config.source, "raw": _plain(config.raw),
            "search": dataclasses.asdict(config.search),
            "measurement": dataclasses.asdict(config.measurement), "retune": retune,
            "lock": dataclasses.asdict(config.lock), "track": dataclasses.asdict(config.track)}


def _config_from_spec(spec: Mapping[str, Any]) -> RunConfig:
    config = config_from_dict(spec["raw"], source=spec["source"])
    track = TrackConfig(**spec["track"]) if "track" in spec else config.track
    return dataclasses.replace(config, search=SearchConfig(**spec["search"]),
                               measurement=MeasurementConfig(**spec["measurement"]),
                               retune=RetuneConfig(**spec["retune"]),
                               lock=LockConfig(**spec.get("lock", dataclasses.asdict(config.lock))),
                               track=track)


def _plain(value: Any) -> Any:
    """Nested mappings and sequences as JSON's dicts and lists (TOML's tables and arrays)."""
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    return value


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
        "setpoints": {k: float(v) for k, v in result["setpoints"].items()},
        "accepted": bool(result["accepted"]),
        "reason": result.get("reason", ""),
        # The stage's own bound (None when it states none) against the truth's shortfall.
        "predicted_shortfall_upper": (result.get("predicted_shortfall") or {}).get("upper"),
        "true_shortfall": 1.0 - final["ratio"],
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
    """Calibrate one scenario with one strategy (then, if asked, step the cavity and retune)."""
    config = _config_from_spec(job["config"])
    scenario = job["scenario"]
    config = dataclasses.replace(config, search=dataclasses.replace(
        config.search, seed=scenario["search_seed"]))
    rig = _local_rig(job["rig"], scenario["perturbation"], scenario["rig_seed"])
    record: dict[str, Any] = {"family": scenario["family"], "scenario": scenario["index"],
                              "strategy": config.search.strategy}
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
                stage = _stage_record(result, follower, rig, clock_start,
                                      time.perf_counter() - wall)
                stage["ratio_after_step"] = before["ratio"]
                # The blind spot the issue counts: the check passed on a peak that had moved.
                stage["moved_judged_still_good"] = bool(
                    result["status"] == "still_good" and before["ratio"] < THRESHOLD)
                record["retune"] = stage
    return record


def _oracle_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """Verify at the true best set-points only: the shots and precision of that verification."""
    config = _config_from_spec(job["config"])
    scenario = job["scenario"]
    rig = _local_rig(job["rig"], scenario["perturbation"], scenario["rig_seed"])
    best = rig.truth()["best"]["setpoints"]
    inside = all(sp.search_min <= best[sp.name] <= sp.search_max for sp in config.setpoints)
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
    return {"family": scenario["family"], "scenario": scenario["index"],
            "verification_shots": verify_shots,
            "total_shots": int(result["shots"]), "verified_inversion": float(result["inversion"]),
            "verified_stderr": float(result["inversion_stderr"]),
            "final_ratio": _final_truth(rig, result["setpoints"])["ratio"],
            "best_setpoints_at_start": {k: float(v) for k, v in best.items()},
            "best_inside_box_at_start": inside}


def _memory_now() -> dict[str, float]:
    gc.collect()
    current, peak = tracemalloc.get_traced_memory()
    tracemalloc.reset_peak()
    rss_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    return {"traced_current_mib": current / 2**20, "traced_peak_mib": peak / 2**20,
            "max_rss_mib": rss_kib / 1024.0}


def _night_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """A calibration then back-to-back retunes until ``steps`` measurements, memory traced."""
    config = _config_from_spec(job["config"])
    scenario = job["scenario"]
    steps_wanted = int(job["steps"])
    tracemalloc.start()
    wall = time.perf_counter()
    rig = _local_rig(job["rig"], scenario["perturbation"], scenario["rig_seed"])
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
    return {"family": scenario["family"], "scenario": scenario["index"], "steps": steps,
            "stages": stages, "thermal_steps": thermal_steps,
            "rig_clock_h": rig.sim.clock / 3600.0,
            "final_ratio_median": float(np.median(ratios)),
            "final_ratio_min": float(np.min(ratios)),
            "wall_time_s": time.perf_counter() - wall, "checkpoints": checkpoints}


class _NightRig:
    """A simulated rig watched through a night: the truth on a fine grid of rig time, thermal
    steps at their times.

    Before and after every operation that lets rig time pass or moves the set-points
    (``apply``, ``acquire``, ``advance``, ``safe``), steps that are due are applied and the
    truth at the set-points in force is sampled (the ``truth`` op does not advance the clock);
    an ``advance`` is cut into pieces of at most ``grid_s`` and at the steps' times, each
    sampled. Each interval between two samples counts at the lower of its two ends
    (:func:`_fraction_at`), so a fall within an operation is never hidden by the sample before
    it.
    """

    def __init__(self, rig: Any, steps: Sequence[tuple[float, float]], grid_s: float) -> None:
        self.rig = rig
        self.pending = sorted((float(t), float(x)) for t, x in steps)
        self.applied: list[dict[str, float]] = []
        self.grid_s = float(grid_s)
        self.samples: list[tuple[float, float]] = []
        self.acquired_shots = 0
        self.watching = False

    def __getattr__(self, name: str) -> Any:
        return getattr(self.rig, name)

    def _tick(self) -> None:
        clock = self.rig.sim.clock
        while self.pending and self.pending[0][0] <= clock + 1e-9:
            when, shift = self.pending.pop(0)
            self.rig.thermal_step(shift)
            self.applied.append({"scheduled_clock": when, "clock": clock, "shift_hz": shift})
        if self.watching:
            truth = self.rig.truth()
            self.samples.append((clock, float(truth["inversion"]) / float(truth["best"]["inversion"])))

    def apply(self, setpoints: Mapping[str, float], **kwargs: Any) -> Any:
        self._tick()
        reply = self.rig.apply(setpoints, **kwargs)
        self._tick()
        return reply

    def acquire(self, field: str, ramsey_phase: float, shots: int, **kwargs: Any) -> Any:
        self._tick()
        if self.watching:
            self.acquired_shots += int(shots)
        reply = self.rig.acquire(field, ramsey_phase, shots, **kwargs)
        self._tick()
        return reply

    def safe(self, **kwargs: Any) -> Any:
        self._tick()
        reply = self.rig.safe(**kwargs)
        self._tick()
        return reply

    def advance(self, seconds: float) -> dict[str, Any]:
        end = self.rig.sim.clock + float(seconds)
        reply = {"clock": self.rig.sim.clock}
        while self.rig.sim.clock < end - 1e-9:
            self._tick()
            piece = min(self.grid_s, end - self.rig.sim.clock)
            if self.pending:
                piece = min(piece, max(self.pending[0][0] - self.rig.sim.clock, 1e-6))
            reply = self.rig.advance(piece)
        self._tick()
        return reply


def night_steps(scenario: Mapping[str, Any], hours: float, count: int = NIGHT_THERMAL_STEPS
                ) -> list[tuple[float, float]]:
    """The thermal steps of a scenario's night: ``count`` uniform times (s from its start) in
    the night but its last hour (so that each step leaves time to recover; the first half of a
    night shorter than two hours), each of +-15 kHz with a random sign, drawn from the
    scenario's rig seed."""
    rng = np.random.default_rng(np.random.SeedSequence([int(scenario["rig_seed"]), 77]))
    latest = max(hours - 1.0, 0.5 * hours) * 3600.0
    times = np.sort(rng.uniform(0.0, latest, size=count))
    signs = rng.choice([-1.0, 1.0], size=count)
    return [(float(t), float(sgn * THERMAL_STEP_HZ)) for t, sgn in zip(times, signs)]


def _fraction_at(samples: Sequence[tuple[float, float]], end: float, bar: float) -> float:
    """Time-weighted fraction of ``[first sample, end]`` with the ratio at or above ``bar``.

    Each interval between two samples counts at the lower of its two ends (the last sample
    alone up to ``end``).
    """
    if not samples:
        return math.nan
    total = above = 0.0
    for (t, ratio), following in zip(samples, [*samples[1:], (end, math.nan)]):
        span = max(min(following[0], end) - t, 0.0)
        low = ratio if math.isnan(following[1]) else min(ratio, following[1])
        total += span
        above += span if low >= bar else 0.0
    return above / total if total > 0 else math.nan


def _recovery_delays(samples: Sequence[tuple[float, float]], steps: Sequence[Mapping[str, float]],
                     bar: float) -> list[float | None]:
    """Rig time from each step until the ratio is back at ``bar`` (0 if it never fell below;
    None if it did not come back before the night ended)."""
    out: list[float | None] = []
    for step in steps:
        after = [(t, r) for t, r in samples if t >= step["clock"] - 1e-9]
        if not after or after[0][1] >= bar:
            out.append(0.0)
            continue
        back = next((t for t, r in after if r >= bar), None)
        out.append(None if back is None else back - step["clock"])
    return out


def _hold_night_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """One night of a scenario: calibrate, then hold it with ``track`` or with today's schedule.

    The night lasts ``hours`` of rig time after the calibration, with the scenario's drift
    (no ramp on a quiet night) and its thermal steps (none on a quiet night).
    """
    from autotune.run import track as tracking

    config = _config_from_spec(job["config"])
    scenario = job["scenario"]
    config = dataclasses.replace(config, search=dataclasses.replace(
        config.search, seed=scenario["search_seed"]))
    perturbation = copy.deepcopy(scenario["perturbation"])
    if job["quiet"]:
        perturbation.setdefault("drift", {})["ramp_hz_per_s"] = 0.0
    hours = float(job["hours"])
    rig = _local_rig(job["rig"], perturbation, scenario["rig_seed"])
    steps = [] if job["quiet"] else [tuple(x) for x in job["steps"]]
    wall = time.perf_counter()
    record: dict[str, Any] = {"family": scenario["family"], "scenario": scenario["index"],
                              "method": job["method"], "interval_s": job.get("interval_s"),
                              "quiet": bool(job["quiet"]), "hours": hours}
    with tempfile.TemporaryDirectory(prefix="autotune-bench-hold-") as tmp:
        store = Path(tmp) / "last-good.json"
        result = runner.calibrate(rig, config, Path(tmp) / "calibrate", store=store)
        record["calibration"] = {"status": result["status"], "shots": int(result["shots"]),
                                 "final_ratio": _final_truth(rig, result["setpoints"])["ratio"]}
        if not result["accepted"]:
            record["skipped"] = "calibration not accepted"
            return record
        start = rig.sim.clock
        end = start + hours * 3600.0
        watched = _NightRig(rig, [(start + t, x) for t, x in steps], NIGHT_GRID_S)
        watched.watching = True
        if job["method"] == "track":
            # Left at the held set-points at the end, like the schedule (nothing to make safe
            # in a study).
            night = dataclasses.replace(config, track=dataclasses.replace(
                config.track, max_rig_time_s=hours * 3600.0, on_stop="last_good"))
            outcome = tracking.track(watched, night, Path(tmp) / "night", store=store)
            record.update({k: outcome.get(k) for k in (
                "status", "checks", "rechecks", "corrections", "alarms", "retunes",
                "calibrations", "failures", "budget_unheld_s", "budget_limited",
                "holding_beam_s", "budget_ceiling_s")})
            record["plans"] = _night_plans(Path(tmp) / "night")
            record["alarm_clocks"] = [c - start for c in _alarm_clocks(Path(tmp) / "night")]
        else:
            retunes = changed = 0
            k = 0
            while rig.sim.clock < end - 1e-6:
                outcome = runner.retune(watched, config, Path(tmp) / f"retune-{k:03d}",
                                        store=store)
                k += 1
                retunes += 1
                changed += outcome["status"] != "still_good"
                if rig.sim.clock < end:
                    watched.advance(min(float(job["interval_s"]), end - rig.sim.clock))
            record.update({"status": "ended", "retunes": retunes, "corrections": changed,
                           "calibrations": 0, "alarms": None, "checks": None})
        watched._tick()
        watched.watching = False
    samples = [(t, r) for t, r in watched.samples if t <= end]
    alarms = [start + c for c in record.get("alarm_clocks") or []]
    record["detection_s"] = [next((a - step["clock"] for a in alarms if a >= step["clock"]), None)
                             for step in watched.applied] if job["method"] == "track" else []
    night_s = max(rig.sim.clock, end) - start
    rate = float(rig.describe().repetition_rate_hz)
    record.update({
        "night_rig_time_s": night_s,
        "fraction_097": _fraction_at(samples, end, LOWER_THRESHOLD),
        "fraction_098": _fraction_at(samples, end, THRESHOLD),
        "holding_share": watched.acquired_shots / rate / night_s,
        "steps": watched.applied,
        "recovery_s": _recovery_delays(samples, watched.applied, LOWER_THRESHOLD),
        "samples": len(samples), "ratio_min": min((r for _, r in samples), default=math.nan),
        "wall_time_s": time.perf_counter() - wall})
    return record


def _alarm_clocks(run_dir: Path) -> list[float]:
    """Rig clocks of the night's alarms (the middle of the check that raised each)."""
    from autotune.run.journal import read_journal

    records = read_journal(run_dir / "journal.jsonl")
    clocks = {r["point"]: r["clock_s"] for r in records if r.get("type") == "hold"}
    return [float(clocks[r["point"]]) for r in records
            if r.get("type") == "decision" and r.get("what") == "alarm" and r["point"] in clocks]


def _night_plans(run_dir: Path) -> list[dict[str, Any]]:
    from autotune.run.journal import read_journal

    return [{"interval_s": r["plan"]["interval_s"], "shots_per_phase": r["plan"]["shots_per_phase"],
             "check_share": r["plan"]["check_share"]}
            for r in read_journal(run_dir / "journal.jsonl")
            if r.get("type") == "decision" and r.get("what") == "plan"]


_JOBS: dict[str, Callable[[Mapping[str, Any]], dict[str, Any]]] = {
    "calibration": _calibration_job, "oracle": _oracle_job, "night": _night_job,
    "hold_night": _hold_night_job}


def run_job(job_json: str, quiet: bool = False) -> str:
    """Run one job given as JSON text and return its result as JSON text.

    The same function runs in this process and on a dask worker, with one BLAS thread (so
    that a result does not depend on where it ran, nor two workers fight over two cores).

    Parameters
    ----------
    job_json : str
        ``{"kind": "calibration" | "oracle" | "night", ...}`` as built by :func:`run_study`.
    quiet : bool
        Configure structlog to warnings only (in a worker process, which has no CLI).
    """
    from threadpoolctl import threadpool_limits

    if quiet:
        _quiet_logging()
    job = json.loads(job_json)
    kind = job["kind"]
    if kind not in _JOBS:
        raise ValueError(f"job kind: expected one of {sorted(_JOBS)}, got {kind!r}")
    with threadpool_limits(limits=1):
        result = _JOBS[kind](job)
    return json.dumps(_jsonable(result), allow_nan=False)


# --------------------------------------------------------------------------------------------
# The night study (section 6)
# --------------------------------------------------------------------------------------------


def _night_label(run: Mapping[str, Any]) -> str:
    if run["method"] == "track":
        return "track (quiet)" if run["quiet"] else "track"
    return f"schedule {float(run['interval_s']) / 60:g} min"


def night_labels() -> list[str]:
    """The methods of the night study, in the order of its table."""
    return ["track", *[f"schedule {s / 60:g} min" for s in NIGHT_SCHEDULES_S], "track (quiet)"]


def _night_jobs(plan: StudyPlan, base: RunConfig, rig: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Per scenario of each night family: ``track``, today's schedules, a quiet ``track``."""
    spec = _config_spec(base)
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


def _summarise_night(runs: Sequence[Mapping[str, Any]], plan: StudyPlan,
                     budget_fraction: float) -> dict[str, Any]:
    """Figures of every method of the night study, per family: the distribution (quartiles,
    least and most), the worst night, and the nights over ``budget_fraction``."""
    out: dict[str, Any] = {}
    for family in plan.night_families:
        mine = [r for r in runs if r["family"] == family]
        out[family] = {}
        for label in night_labels():
            rows = [r for r in mine if _night_label(r) == label]
            done = [r for r in rows if "skipped" not in r]
            delays = [d for r in done for d in r["recovery_s"]]
            detections = [d for r in done for d in r.get("detection_s") or []]
            hours = sum(r["night_rig_time_s"] for r in done) / 3600.0
            alarms = [r.get("alarms") for r in done if r.get("alarms") is not None]
            worst = min(done, key=lambda r: r["fraction_097"], default=None)
            finite = [d for d in delays if d is not None]
            out[family][label] = {
                "nights": len(done), "skipped": len(rows) - len(done),
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
                "worst": None if worst is None else {
                    "scenario": worst["scenario"], "fraction_097": worst["fraction_097"],
                    "fraction_098": worst["fraction_098"],
                    "holding_share": worst["holding_share"], "retunes": worst["retunes"],
                    "alarms": worst.get("alarms"), "recovery_s": worst["recovery_s"],
                    "ratio_min": worst["ratio_min"],
                    "budget_unheld_s": worst.get("budget_unheld_s")},
            }
    return out


def _night_targets(summary: Mapping[str, Any], plan: StudyPlan,
                   budget_fraction: float) -> list[dict[str, Any]]:
    """The issue-22 targets, per family of the night study: every night, not the median."""
    out = []
    schedules = [label for label in night_labels() if label.startswith("schedule")]
    for family in plan.night_families:
        rows = summary[family]
        t, quiet = rows["track"], rows["track (quiet)"]
        least = min(t["fraction_097_all"], default=math.nan)
        out.append(_target(
            f"track [{family}]: every night held",
            ">= 95% of the night at >= 0.97 of the moving best (lower end of each interval), "
            "in the worst night",
            f"worst {_num(least, 3)}, median {_num(t['fraction_097_q'][1], 3)} "
            f"({t['below_095']} of {t['nights']} nights below 95%)",
            bool(t["nights"]) and least >= 0.95))
        out.append(_target(
            f"track [{family}]: beam within the budget",
            f"no night above budget_fraction ({budget_fraction:.0%}) on holding",
            f"{t['over_budget']} of {t['nights']} nights over, most "
            f"{_num(t['holding_share_max'] * 100, 2)}%, median "
            f"{_num(t['holding_share_q'][1] * 100, 2)}%",
            bool(t["nights"]) and t["over_budget"] == 0))
        recovery, most = t["recovery_s_q"][1], t["recovery_s_max"]
        out.append(_target(
            f"track [{family}]: recovery from a {THERMAL_STEP_HZ / 1e3:g} kHz step",
            "within 5 min of rig time in the median, 15 min in the worst night",
            f"{_num(recovery / 60, 1)} min median, {_num(most / 60, 1)} min worst over "
            f"{t['steps']} steps ({t['never_recovered']} never recovered)",
            bool(t["steps"]) and recovery <= 300.0 and most <= 900.0))
        false = quiet["alarms_per_8h_max"]
        out.append(_target(
            f"track [{family}]: quiet night (no steps, no ramp)",
            "at most one false retune per 8 h in any night",
            f"{_num(false, 2)} per 8 h in the worst night ({quiet['alarms_total']} alarms in "
            f"{quiet['rig_hours']:.0f} h)", bool(quiet["nights"]) and false <= 1.0))
        if not all(rows[label]["nights"] for label in schedules):
            continue
        better = []
        for key in ("fraction_097_q", "fraction_098_q"):
            mine = t[key][1]
            theirs = [rows[label][key][1] for label in schedules]
            better.append(all(mine >= other for other in theirs) and
                          any(mine > other for other in theirs))
        out.append(_target(
            f"track [{family}]: against today's schedules in this run",
            "better than both on the fractions at >= 0.97 and >= 0.98 (medians)",
            "; ".join(f"{label}: {_num(rows[label]['fraction_097_q'][1], 3)} / "
                      f"{_num(rows[label]['fraction_098_q'][1], 3)}"
                      for label in ["track", *schedules]),
            all(better)))
    return out


# --------------------------------------------------------------------------------------------
# Optimiser overhead (this process, after the jobs: a quiet machine)
# --------------------------------------------------------------------------------------------


def _measure_overhead(config: RunConfig, plan: StudyPlan, rig: Mapping[str, Any],
                      scenario: Mapping[str, Any], stderr: float) -> dict[str, Any]:
    """Wall time of ask + tell of the Bayesian strategy as told points grow.

    The landscape is the simulated rig's noiseless truth (frozen clock) plus Gaussian noise of
    standard deviation ``stderr`` (that of one search point).
    """
    local = _local_rig(rig, scenario["perturbation"], scenario["rig_seed"])
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
    per_step_shots = _per_point_shots(config)
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


def _ratio(numerator: float, denominator: float) -> float:
    if math.isnan(numerator) or math.isnan(denominator):
        return math.nan
    if math.isinf(denominator):
        return 0.0 if not math.isinf(numerator) else math.nan
    if denominator == 0:
        return math.inf
    return numerator / denominator


def _summarise(rows: Sequence[Mapping[str, Any]], oracle_shots: float) -> dict[str, Any]:
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
    summary["stage_shots_over_oracle"] = _ratio(summary["stage_shots_q"][1], oracle_shots)
    summary["shots_to_threshold_over_oracle"] = _ratio(summary["shots_to_threshold_q"][1],
                                                       oracle_shots)
    return summary


def _summarise_retunes(records: Sequence[Mapping[str, Any]], oracle_shots: float
                       ) -> dict[str, Any]:
    done = [r for r in records if "skipped" not in r["retune"]]
    rows = [r["retune"] for r in done]
    summary = _summarise(rows, oracle_shots)
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


def _allowed_misses(runs: int) -> int:
    """Scenarios allowed below 98 % under "at least 19 of 20": one per whole twenty."""
    return runs // 20


def _target(name: str, target: str, measured: str, met: bool | None) -> dict[str, Any]:
    status = "not run" if met is None else "met" if met else "MISSED"
    return {"name": name, "target": target, "measured": measured,
            "met": None if met is None else bool(met), "status": status}


def _guided_targets(summary: Mapping[str, Mapping[str, Any]],
                    retune: Mapping[str, Mapping[str, Any]], families: Sequence[str],
                    run: bool) -> list[dict[str, Any]]:
    """The issue-10 targets of the guided strategy, per family ("not run" when absent)."""
    g = GUIDED
    label = ", ".join(families)
    kinds = [
        ("median whole-stage shots", "<= 2x the oracle floor"),
        (f"final true ratio >= {THRESHOLD:.2f}", "in at least 19 of 20 scenarios"),
        (f"final true ratio >= {LOWER_THRESHOLD:.2f}", "in every scenario"),
        ("whole-stage shots vs coordinate", ">= 8x fewer than the coordinate scan at equal or "
         "better final quality (median final true ratio at most 0.005 lower, no more "
         f"scenarios below {THRESHOLD:.2f})"),
        (f"retune after a {THERMAL_STEP_HZ / 1e3:g} kHz step: median whole-stage shots",
         "<= 1.5x the oracle floor"),
        (f"retune after a {THERMAL_STEP_HZ / 1e3:g} kHz step: final true ratio >= "
         f"{THRESHOLD:.2f}", "in at least 19 of 20 scenarios"),
        (f"retune after a {THERMAL_STEP_HZ / 1e3:g} kHz step: moved peaks judged still good",
         f"none (check passed while the true ratio at the old set-points was below "
         f"{THRESHOLD:.2f})"),
    ]
    if not run:
        return [_target(f"{g} [{label}]: {name}", target, f"{g} is not in this run's strategies",
                        None) for name, target in kinds]
    out = []
    for family in families:
        s = summary[family][g]
        n = s["runs"]
        allowed = _allowed_misses(n)
        ratio = s["stage_shots_over_oracle"]
        out.append(_target(f"{g} [{family}]: {kinds[0][0]}", kinds[0][1],
                           f"{ratio:.2f}x ({_num(s['stage_shots_q'][1])} shots)",
                           ratio <= 2.0))
        out.append(_target(f"{g} [{family}]: {kinds[1][0]}", kinds[1][1] +
                           f" (here at most {allowed} of {n} below)",
                           f"{s['below_threshold']} of {n} below",
                           s["below_threshold"] <= allowed))
        out.append(_target(f"{g} [{family}]: {kinds[2][0]}", kinds[2][1],
                           f"{s['below_lower_threshold']} of {n} below (lowest "
                           f"{s['final_ratio_min']:.3f})", s["below_lower_threshold"] == 0))
        c = summary[family].get("coordinate")
        if c is None:
            out.append(_target(f"{g} [{family}]: {kinds[3][0]}", kinds[3][1],
                               "coordinate is not in this run's strategies", None))
        else:
            fewer = _ratio(c["stage_shots_q"][1], s["stage_shots_q"][1])
            quality = s["final_ratio_q"][1] >= c["final_ratio_q"][1] - 0.005 and \
                s["below_threshold"] <= c["below_threshold"]
            out.append(_target(
                f"{g} [{family}]: {kinds[3][0]}", kinds[3][1],
                f"{fewer:.2f}x fewer; final median {s['final_ratio_q'][1]:.3f} vs "
                f"{c['final_ratio_q'][1]:.3f}; below {THRESHOLD:.2f}: {s['below_threshold']} vs "
                f"{c['below_threshold']}", fewer >= 8.0 and quality))
        r = retune.get(family, {}).get(g)
        if r is None:
            for name, target in kinds[4:]:
                out.append(_target(f"{g} [{family}]: {name}", target,
                                   "no retunes in this run", None))
            continue
        rn = r["runs"]
        ratio = r["stage_shots_over_oracle"]
        out.append(_target(f"{g} [{family}]: {kinds[4][0]}", kinds[4][1],
                           f"{ratio:.2f}x ({_num(r['stage_shots_q'][1])} shots)"
                           if rn else "no retune ran", rn > 0 and ratio <= 1.5))
        # A skipped retune (calibration not accepted) counts as a miss: nothing was retuned.
        misses = r["below_threshold"] + r["skipped"]
        out.append(_target(f"{g} [{family}]: {kinds[5][0]}", kinds[5][1] +
                           f" (here at most {_allowed_misses(r['scenarios'])} of "
                           f"{r['scenarios']} below)",
                           f"{r['below_threshold']} of {rn} below, {r['skipped']} skipped",
                           misses <= _allowed_misses(r["scenarios"])))
        out.append(_target(f"{g} [{family}]: {kinds[6][0]}", kinds[6][1],
                           f"{r['moved_judged_still_good']} of {rn} retunes "
                           f"({r['still_good']} checks passed)",
                           r["moved_judged_still_good"] == 0))
    return out


def _secondary_targets(summary: Mapping[str, Any], oracle_shots: float,
                       overhead: Mapping[str, Any] | None, night: Mapping[str, Any] | None
                       ) -> list[dict[str, Any]]:
    """Issue 5's targets (Bayesian search against the hand strategies, main draw), overhead, memory."""
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
                bayes["never_reached"] <= o["never_reached"]
            targets.append(_target(
                f"bayesian vs {other} [main]: median shots to {THRESHOLD:.0%}",
                f">= {factor:g}x fewer at equal final quality",
                (f"{ratio:.2f}x fewer" if math.isfinite(ratio) else
                 f"{other}'s median run never got there") +
                f"; final ratio {b_quality:.3f} vs {o['final_ratio_q'][1]:.3f}; never reached "
                f"{bayes['never_reached']} vs {o['never_reached']}",
                ratio >= factor and quality))
        ratio = _ratio(b_shots, oracle_shots)
        targets.append(_target("bayesian vs oracle floor [main]: median shots to threshold",
                               "<= 20x the oracle floor", f"{ratio:.2f}x", ratio <= 20.0))
    if overhead is not None:
        worst = max(overhead["rows"], key=lambda r: r["fraction_of_step"])
        targets.append(_target(
            f"optimiser overhead up to {overhead['rows'][-1]['points']} points",
            "<= 5% of one step's rig time",
            f"worst {worst['fraction_of_step']:.2%} at {worst['points']} points",
            worst["fraction_of_step"] <= 0.05))
    if night is not None:
        targets.append(_target(f"memory over {night['steps']} steps of a simulated night",
                               "flat (traced memory grows < 10% after warm-up)",
                               f"{night['growth_fraction']:+.1%} "
                               f"({night['slope_kib_per_step']:+.2f} KiB/step)",
                               night["growth_fraction"] < 0.10))
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
              progress: Callable[[str], None] | None = None,
              scheduler: str | None = None, command: str | None = None) -> dict[str, Any]:
    """Run the whole study of ``plan`` and return its JSON-ready result.

    Parameters
    ----------
    plan : StudyPlan
        Sizes (see :func:`plan_for`). ``plan.workers`` of 1 and no ``scheduler`` run every job
        in this process, without dask.
    config_path : Path
        The calibrate/retune TOML (default ``configs/dry-run.toml``).
    rig_config_path : Path
        The demo simulated rig TOML (default ``configs/sim-rig.toml``).
    progress : callable, optional
        Called with a short line as jobs finish.
    scheduler : str, optional
        Address of a running dask scheduler to send the jobs to (instead of a local cluster).
    command : str, optional
        The command line recorded in the result (default: the one of ``plan.mode``).
    """
    check_plan(plan)
    wall = time.perf_counter()
    base = _base_config(plan, config_path)
    configs = strategy_configs(base, plan)
    scenarios = family_scenarios(plan)
    rig = _rig_data(rig_config_path)
    retuned = [k for k in plan.strategies if plan.retune and k in plan.retune_strategies]
    jobs: list[dict[str, Any]] = []
    first = scenarios[plan.families[0]][0]
    if plan.calibration_study and plan.night_steps > 0:
        # The longest job first, so that it overlaps all the others.
        jobs.append({"kind": "night", "config": _config_spec(configs.get("bayesian", base)),
                     "scenario": first, "steps": plan.night_steps, "rig": rig})
    if plan.night_study:
        # Then the nights of section 6 (tens of seconds each).
        jobs += _night_jobs(plan, base, rig)
    specs = {kind: _config_spec(cfg) for kind, cfg in configs.items()}
    base_spec = _config_spec(base)
    for family in plan.families if plan.calibration_study else ():
        for scenario in scenarios[family]:
            for kind in plan.strategies:
                jobs.append({"kind": "calibration", "config": specs[kind], "scenario": scenario,
                             "rig": rig, "retune": kind in retuned})
            jobs.append({"kind": "oracle", "config": base_spec, "scenario": scenario, "rig": rig})
    results, where = _map(jobs, plan, scheduler, progress)
    holds = [r for r in results if "method" in r]
    night_study = None
    if plan.night_study:
        night_summary = _summarise_night(holds, plan, base.track.budget_fraction)
        night_study = {"hours": plan.night_hours, "thermal_steps": NIGHT_THERMAL_STEPS,
                       "thermal_step_hz": THERMAL_STEP_HZ, "schedules_s": list(NIGHT_SCHEDULES_S),
                       "grid_s": NIGHT_GRID_S, "families": list(plan.night_families),
                       "scenarios": plan.night_scenarios,
                       "track": dataclasses.asdict(base.track),
                       "summary": night_summary,
                       "targets": _night_targets(night_summary, plan, base.track.budget_fraction),
                       "runs": sorted(holds, key=lambda r: (r["family"], r["scenario"],
                                                            _night_label(r)))}
    try:
        dask_version = metadata.version("distributed")
    except metadata.PackageNotFoundError:
        dask_version = "not installed"
    head = {
        "study": "autotune benchmark (issues 5, 10 and 12)", "mode": plan.mode,
        "simulated": True, "threshold": THRESHOLD, "lower_threshold": LOWER_THRESHOLD,
        "guided_strategy": GUIDED,
        "command": command or "python -m autotune.bench" + {
            "full": "", "quick": " --quick", "tiny": " --tiny"}[plan.mode]
        + ("" if plan.calibration_study else " --night"),
        "wall_time_s": time.perf_counter() - wall,
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "platform": platform.platform(), "workers": plan.workers,
                    "ran_on": where, "distributed": dask_version},
        "plan": _jsonable(dataclasses.asdict(plan)),
        "code": _provenance(),
        "config": str(config_path), "rig_config": str(rig_config_path),
        "calibration_study": plan.calibration_study,
        "night_study": night_study,
    }
    if not plan.calibration_study:
        return {**head, "families": {name: _family_record(plan, name)
                                     for name in plan.night_families},
                "scenario_ranges": {f"{s}.{k}": list(v) for (s, k), v in SCENARIO_RANGES.items()},
                "targets": night_study["targets"]}
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
        overhead = _measure_overhead(configs["bayesian"], plan, rig, first, stderr)

    oracle_shots = float(np.median([o["verification_shots"] for o in oracles]))
    summary: dict[str, dict[str, Any]] = {}
    retune: dict[str, dict[str, Any]] = {}
    oracle_families: dict[str, Any] = {}
    for family in plan.families:
        mine = [r for r in calibrations if r["family"] == family]
        summary[family] = {kind: _summarise([r["calibrate"] for r in mine
                                             if r["strategy"] == kind], oracle_shots)
                           for kind in plan.strategies}
        retune[family] = {kind: _summarise_retunes([r for r in mine if r["strategy"] == kind
                                                    and "retune" in r], oracle_shots)
                          for kind in retuned}
        theirs = [o for o in oracles if o["family"] == family]
        oracle_families[family] = {
            "verified_stderr_median": float(np.median([o["verified_stderr"] for o in theirs])),
            "final_ratio_median": float(np.median([o["final_ratio"] for o in theirs])),
            "best_outside_box_at_start": sum(not o["best_inside_box_at_start"] for o in theirs),
            "scenarios": len(theirs)}
    oracle = {"shots": oracle_shots,
              "verified_stderr_median": float(np.median([o["verified_stderr"] for o in oracles])),
              "final_ratio_median": float(np.median([o["final_ratio"] for o in oracles])),
              "families": oracle_families,
              "runs": sorted(oracles, key=lambda o: (o["family"], o["scenario"]))}
    if night is not None:
        night = _night_growth(night)
    targets = _guided_targets(summary, retune, plan.families, GUIDED in plan.strategies)
    targets += _secondary_targets(summary.get("main", {}), oracle_shots, overhead, night)
    if night_study is not None:
        targets += night_study["targets"]
    head["wall_time_s"] = time.perf_counter() - wall
    return {
        **head,
        "search_configs": {kind: _jsonable(dataclasses.asdict(cfg.search))
                           for kind, cfg in configs.items()},
        "families": {name: _family_record(plan, name) for name in plan.families},
        "scenario_ranges": {f"{s}.{k}": list(v) for (s, k), v in SCENARIO_RANGES.items()},
        "scenarios": scenarios,
        "strategies": {kind: _settings_of(cfg) for kind, cfg in configs.items()},
        "retune_strategies": retuned,
        "summary": summary, "oracle": oracle, "overhead": overhead, "night": night,
        "retune": retune, "targets": targets,
        "runs": sorted(calibrations, key=lambda r: (r["family"], r["scenario"], r["strategy"])),
    }


def _family_record(plan: StudyPlan, name: str) -> dict[str, Any]:
    family = FAMILIES[name]
    return {"seed": family_seed(plan, name), "summary": family.summary,
            "ranges": {f"{s}.{k}": list(v) for (s, k), v in family.ranges.items()},
            "profiles": {p: {"key": f"cavity.{key}", "range": list(bounds)}
                         for p, (key, bounds) in family.profiles.items()}}


def _note(progress: Callable[[str], None] | None, result: Mapping[str, Any]) -> None:
    if progress is None:
        return
    if "checkpoints" in result:
        progress(f"night: {result['steps']} steps in {result['wall_time_s']:.0f} s")
    elif "method" in result and "skipped" in result:
        progress(f"{result['family']:<8} scenario {result['scenario']:2d} "
                 f"{_night_label(result):<16} skipped: {result['skipped']}")
    elif "method" in result:
        progress(f"{result['family']:<8} scenario {result['scenario']:2d} "
                 f"{_night_label(result):<16} night at >= 0.97: {result['fraction_097']:.3f}, "
                 f"holding {result['holding_share']:.1%}, {result['wall_time_s']:.0f} s")
    elif "calibrate" in result:
        c = result["calibrate"]
        progress(f"{result['family']:<8} scenario {result['scenario']:2d} "
                 f"{result['strategy']:<10} {c['points']:3d} points, {c['shots']:,} shots, "
                 f"final {c['final_ratio']:.3f}, {c['wall_time_s']:.0f} s")


def _counting(progress: Callable[[str], None] | None, total: int
              ) -> Callable[[str], None] | None:
    """``progress`` with each finished job's line led by the jobs done of ``total`` and the
    wall time to go at the pace so far."""
    if progress is None:
        return None
    started = time.perf_counter()
    done = 0

    def note(line: str) -> None:
        nonlocal done
        done += 1
        elapsed = time.perf_counter() - started
        to_go = format_duration(elapsed / done * (total - done))
        progress(f"[{done}/{total} jobs, {format_duration(elapsed)} wall, ~{to_go} to go] "
                 f"{line.strip()}")

    return note


def _map(jobs: list[dict[str, Any]], plan: StudyPlan, scheduler: str | None,
         progress: Callable[[str], None] | None) -> tuple[list[dict[str, Any]], str]:
    """Run the jobs; results in the order of ``jobs``, and where they ran."""
    progress = _counting(progress, len(jobs))
    texts = [json.dumps(job, allow_nan=False) for job in jobs]
    if scheduler is None and plan.workers <= 1:
        results = []
        for text in texts:
            results.append(json.loads(run_job(text)))
            _note(progress, results[-1])
        return results, "serial (this process)"
    return _map_on_cluster(jobs, texts, plan, scheduler, progress)


def _run_job_in_subprocess(job_json: str, timeout_s: float) -> str:
    """:func:`run_job` in a fresh interpreter, for a job that traces its process's memory.

    A dask worker's own bookkeeping (its event loop, logs and metrics, in other threads) is
    traced by tracemalloc too and grows with wall time; a child process of the worker holds
    only the job. The worker's slot stays taken while it waits, as a process pool's would.
    """
    code = ("import sys; from pathlib import Path; from autotune.bench import run_job; "
            "Path(sys.argv[2]).write_text(run_job(Path(sys.argv[1]).read_text(), quiet=True))")
    with tempfile.TemporaryDirectory(prefix="autotune-bench-job-") as tmp:
        job_path, result_path = Path(tmp) / "job.json", Path(tmp) / "result.json"
        job_path.write_text(job_json, encoding="utf-8")
        done = subprocess.run([sys.executable, "-c", code, str(job_path), str(result_path)],
                              capture_output=True, text=True, timeout=timeout_s, check=False)
        if done.returncode != 0:
            raise RuntimeError(f"job in a subprocess failed with exit code {done.returncode}: "
                               f"{done.stderr[-2000:]}")
        return result_path.read_text(encoding="utf-8")


def _map_on_cluster(jobs: list[dict[str, Any]], texts: list[str], plan: StudyPlan,
                    scheduler: str | None, progress: Callable[[str], None] | None
                    ) -> tuple[list[dict[str, Any]], str]:
    # dask is imported here only: `import autotune` and serial runs never pay for it.
    from distributed import Client, LocalCluster, as_completed

    with contextlib.ExitStack() as stack:
        if scheduler is None:
            # Spawned worker processes (dask's default), one thread each, on loopback;
            # death_timeout bounds each worker's start. No dashboard, and the scheduler's
            # small HTTP server on a free port (its default, 8787, may be taken: dask then
            # warns and moves).
            cluster = LocalCluster(n_workers=plan.workers, threads_per_worker=1,
                                   processes=True, host="127.0.0.1", dashboard_address=None,
                                   scheduler_kwargs={"dashboard": False,
                                                     "dashboard_address": "127.0.0.1:0"},
                                   death_timeout=CLUSTER_START_TIMEOUT_S)
            stack.callback(cluster.close, timeout=CLUSTER_CLOSE_TIMEOUT_S)
            client = Client(cluster, timeout=CLUSTER_START_TIMEOUT_S, set_as_default=False)
            where = f"local dask cluster ({plan.workers} worker processes)"
        else:
            client = Client(scheduler, timeout=CLUSTER_START_TIMEOUT_S, set_as_default=False)
            where = f"dask scheduler {scheduler}"
        # Registered after the cluster's: closed first (a client outliving its cluster waits
        # on a scheduler that is gone).
        stack.callback(client.close, timeout=CLUSTER_CLOSE_TIMEOUT_S)
        client.wait_for_workers(1, timeout=CLUSTER_START_TIMEOUT_S)
        # Submitted in order: dask runs earlier submissions first (the night job leads).
        futures = [client.submit(_run_job_in_subprocess, text, plan.timeout_s, pure=False)
                   if job["kind"] == "night" else
                   client.submit(run_job, text, quiet=True, pure=False)
                   for job, text in zip(jobs, texts)]
        position = {future.key: k for k, future in enumerate(futures)}
        results: list[dict[str, Any] | None] = [None] * len(texts)
        try:
            for future in as_completed(futures, timeout=plan.timeout_s, loop=client.loop):
                k = position[future.key]
                results[k] = json.loads(future.result())
                _note(progress, results[k])
        except BaseException:
            client.cancel(futures)
            raise
    return [r for r in results if r is not None], where


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
                f"{_num(t['recovery_s_max'] / 60, 1)} min")
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
                f"{_num(row['alarms_per_8h_q'][1], 2) if quiet else '-':>8}")
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
        return _format_legacy_table(study)
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
                f"{_num(row['stage_shots_over_oracle'], 1):>8} "
                f"{_q(row['final_ratio_q'], 3):>21} {row['below_threshold']:>5} "
                f"{row['below_lower_threshold']:>5}   {_q(row['shots_to_threshold_q']):>30} "
                f"{row['never_reached']:>5}")
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
                    f"{_q(r['stage_shots_q']):>27} {_num(r['stage_shots_over_oracle'], 2):>8} "
                    f"{_num(r['shots_over_calibration_q'][1], 2):>8} "
                    f"{_q(r['final_ratio_q'], 3):>21} {r['below_threshold']:>5} "
                    f"{r['below_lower_threshold']:>5}")
    if study.get("night_study"):
        lines.append("")
        lines += _format_night(study["night_study"])
    lines.append("")
    lines.append(f"targets (ratios from this one run; {GUIDED} is the physics-guided strategy):")
    for t in study["targets"]:
        lines.append(f"  [{t['status']}] {t['name']}: target {t['target']}; measured "
                     f"{t['measured']}")
    return "\n".join(lines)


def _format_legacy_table(study: Mapping[str, Any]) -> str:
    """The table of a result written before the study had scenario families (one draw)."""
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
    """``python -m autotune.bench [--quick | --tiny] [--out PATH] ...``; returns the exit code.

    Exit codes: 0 done; 2 bad input (options, configuration, a result file that cannot be
    shown); 3 the cluster failed to start or the jobs did not finish within ``--timeout-s``.
    """
    parser = argparse.ArgumentParser(
        prog="python -m autotune.bench",
        description="Benchmark study on the bundled SIMULATED rig: what each strategy costs to "
                    "calibrate on three scenario families, the oracle floor, optimiser overhead, "
                    "a night's memory, retune, and holding the condition through a night "
                    "(track against today's schedules).")
    size = parser.add_mutually_exclusive_group()
    size.add_argument("--quick", action="store_true", help="fewer scenarios, shorter night")
    size.add_argument("--tiny", action="store_true", help="smoke-test sizes (seconds)")
    parser.add_argument("--night", action="store_true",
                        help="the night study alone (section 6: track against today's schedules)")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT,
                        help=f"JSON result file (default {DEFAULT_OUT.relative_to(REPO)})")
    parser.add_argument("--workers", type=int, default=2,
                        help="worker processes of the local dask cluster (default 2; 1 runs "
                             "everything in this process)")
    parser.add_argument("--serial", action="store_true",
                        help="run every job in this process, without dask")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="send the jobs to a running dask scheduler (e.g. "
                             "tcp://127.0.0.1:8786) instead of starting a local cluster")
    parser.add_argument("--timeout-s", type=float, default=DEFAULT_TIMEOUT_S,
                        help=f"bound of the whole set of jobs on a cluster, s (default "
                             f"{DEFAULT_TIMEOUT_S:g})")
    parser.add_argument("--scenarios", type=int, help="scenarios per family (default by mode)")
    parser.add_argument("--seed", type=int, help="seed of the main scenario draw")
    parser.add_argument("--calibration-only", action="store_true",
                        help="sections 1, 2 and 5 alone: calibrations, the oracle floor and "
                             "retunes, without the optimiser overhead, the long run and the "
                             "night study")
    parser.add_argument("--families", metavar="NAMES",
                        help="comma-separated families of the calibration study (default: "
                             "every family, " + ",".join(FAMILIES) + ")")
    parser.add_argument("--night-families", metavar="NAMES",
                        help="comma-separated families of the night study (default: every "
                             "family, " + ",".join(FAMILIES) + ")")
    parser.add_argument("--no-schedules", action="store_true",
                        help="night study: track and its quiet night only, without today's "
                             "retune schedules")
    parser.add_argument("--strategies", metavar="NAMES",
                        help="comma-separated strategies (default " + ",".join(STRATEGIES) + ")")
    parser.add_argument("--config", type=Path, default=DEFAULT_RUN_CONFIG,
                        help="calibrate/retune TOML (default configs/dry-run.toml)")
    parser.add_argument("--rig-config", type=Path, default=DEFAULT_RIG_CONFIG,
                        help="demo simulated rig TOML (default configs/sim-rig.toml)")
    parser.add_argument("--quiet", action="store_true",
                        help="no progress (on a terminal one line updated in place, else one "
                             "line per finished job); the table is still printed")
    size.add_argument("--show", type=Path, metavar="RESULT_JSON",
                      help="print the table of a result file written earlier; run nothing")
    argv = list(sys.argv[1:] if argv is None else argv)
    ns = parser.parse_args(argv)
    if ns.show is not None:
        try:
            study = json.loads(ns.show.read_text(encoding="utf-8"))
            print(format_table(study))
        except (OSError, ValueError, KeyError, TypeError) as exc:
            print(f"error: cannot show {ns.show}: {type(exc).__name__}: {exc}", file=sys.stderr)
            return 2
        return 0
    if ns.serial and ns.scheduler:
        parser.error("--serial and --scheduler exclude each other")
    if not (ns.timeout_s > 0 and math.isfinite(ns.timeout_s)):
        parser.error(f"--timeout-s: expected a number of seconds > 0, got {ns.timeout_s!r}")
    mode = "quick" if ns.quick else "tiny" if ns.tiny else "full"
    strategies = None if ns.strategies is None else tuple(
        name.strip() for name in ns.strategies.split(",") if name.strip())
    try:
        plan = plan_for(mode, workers=1 if ns.serial else ns.workers, scenarios=ns.scenarios,
                        seed=ns.seed, strategies=strategies, night_only=ns.night)
    except ValueError as exc:
        parser.error(str(exc))
    plan = dataclasses.replace(plan, timeout_s=ns.timeout_s)
    if ns.calibration_only and ns.night:
        parser.error("--calibration-only and --night exclude each other")
    if ns.calibration_only or ns.families is not None:
        extra: dict[str, Any] = {}
        if ns.calibration_only:
            extra.update(night_steps=0, overhead_points=(), night_study=False)
        if ns.families is not None:
            extra["families"] = tuple(name.strip() for name in ns.families.split(",")
                                      if name.strip())
        plan = dataclasses.replace(plan, **extra)
        try:
            check_plan(plan)
        except ValueError as exc:
            parser.error(str(exc))
    if ns.night_families is not None or ns.no_schedules:
        changes: dict[str, Any] = {"night_schedules": not ns.no_schedules}
        if ns.night_families is not None:
            changes["night_families"] = tuple(
                name.strip() for name in ns.night_families.split(",") if name.strip())
        plan = dataclasses.replace(plan, **changes)
        try:
            check_plan(plan)
        except ValueError as exc:
            parser.error(str(exc))
    # The bench is a command: it configures logging (warnings only) like autotune/cli.py;
    # dask reads its logging level from the environment when first imported, here and in
    # its worker processes.
    logging.basicConfig(level=logging.WARNING)
    _quiet_logging()
    os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "warning")
    # Progress is display only (autotune.display); the study calls it with one line per job.
    from autotune.run.display import ProgressDisplay, progress_mode

    try:
        with ProgressDisplay(progress_mode(quiet=ns.quiet), str, plain_every_s=0.0) as shown:
            study = run_study(plan, config_path=ns.config, rig_config_path=ns.rig_config,
                              progress=shown, scheduler=ns.scheduler,
                              command=" ".join(["python -m autotune.bench", *argv]))
    except TimeoutError as exc:
        print(f"error: the study's jobs did not finish in time ({exc}); bound: --timeout-s "
              f"{plan.timeout_s:g}, cluster start {CLUSTER_START_TIMEOUT_S:g} s", file=sys.stderr)
        return 3
    except OSError as exc:
        print(f"error: cannot reach or start the dask cluster: {exc}", file=sys.stderr)
        return 3
    write_result(study, ns.out)
    print(format_table(study))
    print(f"\nwritten: {ns.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
