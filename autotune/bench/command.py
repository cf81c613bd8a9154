"""``python -m autotune.bench``: the study's command line."""

from __future__ import annotations

import argparse
import dataclasses
import json
import logging
import math
import os
import sys
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any


from autotune.bench.jobs import from_json, jsonable, quiet_logging
from autotune.bench.plan import (CLUSTER_START_TIMEOUT_S, DEFAULT_OUT, DEFAULT_RIG_CONFIG,
                                 DEFAULT_RUN_CONFIG, DEFAULT_TIMEOUT_S, REPO, STRATEGIES,
                                 check_plan, plan_for)
from autotune.bench.scenarios import FAMILIES
from autotune.bench.study import run_study
from autotune.bench.tables import format_table


# --------------------------------------------------------------------------------------------
# Command
# --------------------------------------------------------------------------------------------


def write_result(study: Mapping[str, Any], path: Path) -> None:
    """Write ``study`` as strict JSON (infinities as the strings "inf"/"-inf", NaN as null)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(jsonable(study), indent=1, allow_nan=False) + "\n",
                    encoding="utf-8")


def read_result(path: Path) -> dict[str, Any]:
    """A result file as ``write_result`` wrote it (:func:`~autotune.bench.jobs.from_json`:
    its infinities read back as floats, so that the tables print it as they printed the study
    in memory)."""
    return from_json(path.read_text(encoding="utf-8"))


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
    parser.add_argument("--family-seed-offset", type=int, default=0, metavar="N",
                        help="add N to the fixed seed of every other family (held_out, "
                             "mismatch, velocity_physics, ...): development draws the study "
                             "does not report (default 0, the study's own)")
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
            study = read_result(ns.show)
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
    plan = dataclasses.replace(plan, timeout_s=ns.timeout_s, family_seed_offset=ns.family_seed_offset)
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
    # The bench is a command: it configures logging (warnings only) like autotune/cli/;
    # dask reads its logging level from the environment when first imported, here and in
    # its worker processes.
    logging.basicConfig(level=logging.WARNING)
    quiet_logging()
    os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "warning")
    # Progress is display only (autotune.run.display); the study calls it with one line per job.
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
