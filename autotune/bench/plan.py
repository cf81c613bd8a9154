"""The study's plan: its sizes and seeds by mode, the strategies compared, the thresholds, each
strategy's configuration, and the scenarios of each family for a plan."""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, get_args


from autotune.config import (
    RunConfig,
    StrategyKind,
    load_config,
    packaged_config,
)
from autotune.bench.scenarios import FAMILIES, make_scenarios
from autotune.errors import ValueRefused
from autotune.wire.rig import measurement_shots


REPO = Path(__file__).resolve().parents[2]
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
    family_seed_offset : int
        Added to the fixed seed of every family that has one (0: the study's own draws). A
        development draw of those families that the study does not report, as ``seed`` is
        for the main one.
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
    family_seed_offset: int = 0
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
        raise ValueRefused(f"mode: expected 'full', 'quick' or 'tiny', got {mode!r}")
    changes: dict[str, Any] = {}
    if scenarios is not None:
        if scenarios < 1:
            raise ValueRefused(f"scenarios: expected an integer >= 1, got {scenarios!r}")
        changes["scenarios"] = scenarios
    if workers < 1:
        raise ValueRefused(f"workers: expected an integer >= 1, got {workers!r}")
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
            raise ValueRefused(f"strategies: expected names among {list(known)} "
                               f"(autotune.config.StrategyKind), got {name!r}")
    if not plan.strategies:
        raise ValueRefused("strategies: expected at least one strategy, got none")
    for name in (*plan.families, *plan.night_families):
        if name not in FAMILIES:
            raise ValueRefused(f"families: expected names among {list(FAMILIES)}, got {name!r}")
    if not plan.families:
        raise ValueRefused("families: expected at least one family, got none")
    if not (plan.calibration_study or plan.night_study):
        raise ValueRefused("plan: expected the calibration study, the night study or both")
    if plan.night_study and (plan.night_scenarios < 1 or not plan.night_hours > 0
                             or not plan.night_families):
        raise ValueRefused(f"night study: expected scenarios >= 1, hours > 0 and a family, got "
                           f"{plan.night_scenarios}, {plan.night_hours}, {plan.night_families}")


def base_config(plan: StudyPlan, config_path: Path) -> RunConfig:
    config = load_config(config_path)
    return dataclasses.replace(
        config,
        measurement=dataclasses.replace(config.measurement, **dict(plan.measurement)),
        search=dataclasses.replace(config.search, **dict(plan.search)),
        retune=dataclasses.replace(config.retune, **dict(plan.retune_settings)),
    )


def per_point_shots(config: RunConfig) -> int:
    return measurement_shots(config.measurement.ramsey_phases, config.measurement.shots_per_phase)


def strategy_configs(base: RunConfig, plan: StudyPlan) -> dict[str, RunConfig]:
    """One configuration per strategy; hand strategies get the budget to finish their design.

    The grid gets ``n x n`` points, the coordinate scan ``n x 2 x rounds`` points, and random
    search as many points as the configured budget; their shot and rig-time budgets are raised
    to fit those points. Every other strategy (the Bayesian search, the guided one) keeps the
    configured budget.
    """
    per_point = per_point_shots(base)
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


def settings_of(config: RunConfig) -> dict[str, Any]:
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


def family_seed(plan: StudyPlan, name: str) -> int:
    """The seed of a family's draw in ``plan`` (the main draw takes the plan's seed; a fixed
    seed is moved by the plan's ``family_seed_offset``)."""
    seed = FAMILIES[name].seed
    return plan.seed if seed is None else seed + plan.family_seed_offset


def family_scenarios(plan: StudyPlan) -> dict[str, list[dict[str, Any]]]:
    """The scenarios of every family of ``plan``, by family name."""
    return {name: make_scenarios(plan.scenarios, family_seed(plan, name), FAMILIES[name])
            for name in plan.families}
