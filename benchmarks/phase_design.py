"""Which Ramsey phases to measure: a side-by-side study of measurement designs for the phase lock.

Each design measures every step with K equally spaced Ramsey phases; the shots per step and the
verification's shots are kept equal across designs (``shots_per_phase * K`` constant), so the
designs differ only in how the same shots are spread over the fringe. For each design the
guided calibration and, after a 15 kHz thermal step, the guided retune run on the same scenarios
(a draw of the study's main ranges from its own seed, used for this choice only, never the
study's families). Printed per design: median whole-stage shots of calibration and retune,
final true ratios (min, median), and the count at >= 0.98.

    python3 benchmarks/phase_design.py [--scenarios 20] [--seed 5151] [--workers 2]
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import logging
import sys
import tempfile
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import structlog

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from autotune.bench import jobs as bench_jobs, scenarios as bench_scenarios  # noqa: E402
from autotune import bench  # noqa: E402
from autotune.run import runner  # noqa: E402
from autotune.config import load_config  # noqa: E402

#: (phases, shots per phase of a search point, of a lock/velocity step, of the verification,
#: of a retune check): each row spends the same shots per step as the 6-phase default.
DESIGNS = {
    "3 phases": (3, 3000, 1000, 12000, 6000),
    "4 phases": (4, 2250, 750, 9000, 4500),
    "6 phases": (6, 1500, 500, 6000, 3000),
    "8 phases": (8, 1125, 375, 4500, 2250),
}


def _run(job: dict[str, Any]) -> dict[str, Any]:
    structlog.configure(wrapper_class=structlog.make_filtering_bound_logger(logging.CRITICAL))
    phases, shots, lock_shots, verify, check = DESIGNS[job["design"]]
    config = load_config(REPO / "configs" / "dry-run.toml")
    config = dataclasses.replace(
        config,
        measurement=dataclasses.replace(config.measurement, ramsey_phases=phases,
                                        shots_per_phase=shots,
                                        verification_shots_per_phase=verify),
        search=dataclasses.replace(config.search, strategy="phase_lock",
                                   seed=job["scenario"]["search_seed"]),
        lock=dataclasses.replace(config.lock, lock_shots_per_phase=lock_shots,
                                 velocity_shots_per_phase=lock_shots),
        retune=dataclasses.replace(config.retune, check_shots_per_phase=check))
    rig = bench_scenarios.local_rig(bench_scenarios.rig_data(REPO / "configs" / "sim-rig.toml"),
                           job["scenario"]["perturbation"], job["scenario"]["rig_seed"])
    out: dict[str, Any] = {"design": job["design"]}
    with tempfile.TemporaryDirectory() as tmp:
        store = Path(tmp) / "good.json"
        calibration = runner.calibrate(rig, config, Path(tmp) / "c", store=store)
        out["calibrate"] = (calibration["shots"], bench_jobs.final_truth(rig, calibration["setpoints"])["ratio"])
        rig.thermal_step(15e3)
        if calibration["accepted"]:
            retune = runner.retune(rig, config, Path(tmp) / "r", store=store)
            out["retune"] = (retune["shots"], bench_jobs.final_truth(rig, retune["setpoints"])["ratio"])
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenarios", type=int, default=20)
    parser.add_argument("--seed", type=int, default=5151)
    parser.add_argument("--workers", type=int, default=2)
    ns = parser.parse_args(argv)
    scenarios = bench.make_scenarios(ns.scenarios, ns.seed)
    jobs = [{"design": d, "scenario": s} for d in DESIGNS for s in scenarios]
    with ProcessPoolExecutor(ns.workers) as pool:
        results = list(pool.map(_run, jobs))
    print(f"phase design study: {ns.scenarios} scenarios of the main ranges, seed {ns.seed}")
    print(f"{'design':<10} {'cal shots':>10} {'cal ratio min/med':>18} {'>=0.98':>7} "
          f"{'ret shots':>10} {'ret ratio min/med':>18} {'>=0.98':>7}")
    summary = {}
    for design in DESIGNS:
        rows = [r for r in results if r["design"] == design]
        line = [f"{design:<10}"]
        summary[design] = {}
        for stage in ("calibrate", "retune"):
            got = [r[stage] for r in rows if stage in r]
            shots = np.median([g[0] for g in got])
            ratios = np.array([g[1] for g in got])
            line.append(f"{shots:>10,.0f} {ratios.min():>8.3f}/{np.median(ratios):.3f}      "
                        f"{int((ratios >= 0.98).sum()):>3}/{len(ratios)}")
            summary[design][stage] = {"median_shots": float(shots), "min": float(ratios.min()),
                                      "median": float(np.median(ratios)),
                                      "at_098": int((ratios >= 0.98).sum()), "n": len(ratios)}
        print(" ".join(line))
    (REPO / "benchmarks" / "results").mkdir(exist_ok=True)
    (REPO / "benchmarks" / "results" / "phase_design.json").write_text(
        json.dumps({"seed": ns.seed, "scenarios": ns.scenarios, "designs": DESIGNS,
                    "summary": summary}, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
