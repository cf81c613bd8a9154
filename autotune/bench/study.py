"""The study run: its jobs mapped in this process, in subprocesses or on a dask cluster, then
summarised with the commit and versions it ran on."""

from __future__ import annotations

import contextlib
import dataclasses
import importlib.metadata as metadata
import json
import math
import os
import platform
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from autotune.progress import rough_duration_text
from autotune.bench.jobs import config_spec, from_json, jsonable
from autotune.bench.memory import measure_overhead
from autotune.bench.night_study import night_jobs, night_label, night_targets, summarise_night
from autotune.bench.plan import (CLUSTER_CLOSE_TIMEOUT_S, CLUSTER_START_TIMEOUT_S,
                                 DEFAULT_RIG_CONFIG, DEFAULT_RUN_CONFIG, GUIDED, LOWER_THRESHOLD,
                                 NIGHT_GRID_S, NIGHT_SCHEDULES_S, NIGHT_THERMAL_STEPS, REPO,
                                 StudyPlan, THERMAL_STEP_HZ, THRESHOLD, base_config, check_plan,
                                 family_scenarios, family_seed, settings_of, strategy_configs)
from autotune.bench.scenarios import FAMILIES, SCENARIO_RANGES, rig_data
from autotune.bench.summaries import summarise, summarise_confidence, summarise_retunes
from autotune.bench.targets import confidence_targets, guided_targets, night_growth, secondary_targets
from autotune.bench.worker import run_job


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
    base = base_config(plan, config_path)
    configs = strategy_configs(base, plan)
    scenarios = family_scenarios(plan)
    rig = rig_data(rig_config_path)
    retuned = [k for k in plan.strategies if plan.retune and k in plan.retune_strategies]
    jobs: list[dict[str, Any]] = []
    first = scenarios[plan.families[0]][0]
    if plan.calibration_study and plan.night_steps > 0:
        # The longest job first, so that it overlaps all the others.
        jobs.append({"kind": "night", "config": config_spec(configs.get("bayesian", base)),
                     "scenario": first, "steps": plan.night_steps, "rig": rig})
    if plan.night_study:
        # Then the nights of section 6 (tens of seconds each).
        jobs += night_jobs(plan, base, rig)
    specs = {kind: config_spec(cfg) for kind, cfg in configs.items()}
    base_spec = config_spec(base)
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
        night_summary = summarise_night(holds, plan, base.track.budget_fraction)
        night_study = {"hours": plan.night_hours, "thermal_steps": NIGHT_THERMAL_STEPS,
                       "thermal_step_hz": THERMAL_STEP_HZ, "schedules_s": list(NIGHT_SCHEDULES_S),
                       "grid_s": NIGHT_GRID_S, "families": list(plan.night_families),
                       "scenarios": plan.night_scenarios,
                       "track": dataclasses.asdict(base.track),
                       "summary": night_summary,
                       "targets": night_targets(night_summary, plan, base.track.budget_fraction),
                       "runs": sorted(holds, key=lambda r: (r["family"], r["scenario"],
                                                            night_label(r)))}
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
        "plan": jsonable(dataclasses.asdict(plan)),
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
        overhead = measure_overhead(configs["bayesian"], plan, rig, first, stderr)

    oracle_shots = float(np.median([o["verification_shots"] for o in oracles]))
    summary: dict[str, dict[str, Any]] = {}
    retune: dict[str, dict[str, Any]] = {}
    confidence: dict[str, dict[str, Any]] = {}
    oracle_families: dict[str, Any] = {}
    for family in plan.families:
        mine = [r for r in calibrations if r["family"] == family]
        summary[family] = {kind: summarise([r["calibrate"] for r in mine
                                             if r["strategy"] == kind], oracle_shots)
                           for kind in plan.strategies}
        retune[family] = {kind: summarise_retunes([r for r in mine if r["strategy"] == kind
                                                    and "retune" in r], oracle_shots,
                                                   base.min_inversion)
                          for kind in retuned}
        confidence[family] = {kind: summarise_confidence(
            [r for r in mine if r["strategy"] == kind], oracle_shots,
            base.min_inversion) for kind in plan.strategies}
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
        night = night_growth(night)
    targets = guided_targets(summary, retune, plan.families, GUIDED in plan.strategies)
    targets += confidence_targets(confidence, plan.families)
    targets += secondary_targets(summary.get("main", {}), oracle_shots, overhead, night)
    if night_study is not None:
        targets += night_study["targets"]
    head["wall_time_s"] = time.perf_counter() - wall
    return {
        **head,
        "search_configs": {kind: jsonable(dataclasses.asdict(cfg.search))
                           for kind, cfg in configs.items()},
        "families": {name: _family_record(plan, name) for name in plan.families},
        "scenario_ranges": {f"{s}.{k}": list(v) for (s, k), v in SCENARIO_RANGES.items()},
        "scenarios": scenarios,
        "strategies": {kind: settings_of(cfg) for kind, cfg in configs.items()},
        "retune_strategies": retuned,
        "summary": summary, "oracle": oracle, "overhead": overhead, "night": night,
        "retune": retune, "confidence": confidence, "targets": targets,
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
                 f"{night_label(result):<16} skipped: {result['skipped']}")
    elif "method" in result:
        progress(f"{result['family']:<8} scenario {result['scenario']:2d} "
                 f"{night_label(result):<16} night at >= 0.97: {result['fraction_097']:.3f}, "
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
        to_go = rough_duration_text(elapsed / done * (total - done))
        progress(f"[{done}/{total} jobs, {rough_duration_text(elapsed)} wall, ~{to_go} to go] "
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
            results.append(from_json(run_job(text)))
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
                results[k] = from_json(future.result())
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
