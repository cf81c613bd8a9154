"""The study's jobs: plain JSON in and out, so that a job gives the same result in this process
or on a dask worker (a calibration, the oracle floor; the stage's record against the truth)."""

from __future__ import annotations

import dataclasses
import json
import logging
import math
import tempfile
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import structlog

from autotune.run import runner
from autotune.run.journal import JOURNAL_NAME, read_journal
from autotune.run.records import Acquisition, Decision, parse_all
from autotune.config import (
    LockConfig,
    MeasurementConfig,
    RetuneConfig,
    RunConfig,
    SearchConfig,
    TrackConfig,
    config_from_dict,
)
from autotune.bench.plan import THERMAL_STEP_HZ, THRESHOLD
from autotune.bench.scenarios import local_rig


# Jobs (plain JSON in and out; run in this process or on a dask worker)
# --------------------------------------------------------------------------------------------


def config_spec(config: RunConfig) -> dict[str, Any]:
    """A configuration as plain data: the parsed TOML plus the sections the study changed."""
    retune = dataclasses.asdict(config.retune)
    retune["half_widths"] = dict(config.retune.half_widths)
    return {"source": config.source, "raw": _plain(config.raw),
            "search": dataclasses.asdict(config.search),
            "measurement": dataclasses.asdict(config.measurement), "retune": retune,
            "lock": dataclasses.asdict(config.lock), "track": dataclasses.asdict(config.track)}


def config_from_spec(spec: Mapping[str, Any]) -> RunConfig:
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


def final_truth(rig: Any, setpoints: Mapping[str, float]) -> dict[str, float]:
    truth = rig.truth(dict(setpoints))
    return {"inversion": float(truth["inversion"]), "best": float(truth["best"]["inversion"]),
            "ratio": float(truth["inversion"]) / float(truth["best"]["inversion"])}


def shots_by_purpose(journal: Path) -> dict[str, int]:
    """Where a stage's shots went: the shots of its journal's acquisitions by the purpose of
    their measurement (``lock``, ``velocity``, ``relock``, ``search``, ``check``, ``correct``,
    ``verify``), the verification's second half apart as ``verify_second_half``."""
    out: dict[str, int] = {}
    second_half = False
    for record in parse_all(read_journal(journal)):
        if isinstance(record, Decision) and record.what == "verify_second_half":
            second_half = True
        elif isinstance(record, Acquisition):
            label = record.label
            if label == "verify" and second_half:
                label = "verify_second_half"
            out[label] = out.get(label, 0) + record.shots
    return out


def _stage_record(result: Mapping[str, Any], follower: _Follower, rig: Any,
                  clock_start: float, wall_s: float, journal: Path | None = None) -> dict[str, Any]:
    final = final_truth(rig, result["setpoints"])
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
        **({"shots_by_purpose": shots_by_purpose(journal)}
           if journal is not None and journal.is_file() else {}),
    }


def quiet_logging() -> None:
    structlog.configure(wrapper_class=structlog.make_filtering_bound_logger(logging.WARNING))


def calibration_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """Calibrate one scenario with one strategy (then, if asked, step the cavity and retune)."""
    config = config_from_spec(job["config"])
    scenario = job["scenario"]
    config = dataclasses.replace(config, search=dataclasses.replace(
        config.search, seed=scenario["search_seed"]))
    rig = local_rig(job["rig"], scenario["perturbation"], scenario["rig_seed"])
    record: dict[str, Any] = {"family": scenario["family"], "scenario": scenario["index"],
                              "strategy": config.search.strategy}
    with tempfile.TemporaryDirectory(prefix="autotune-bench-") as tmp:
        store = Path(tmp) / "last-good.json"
        follower = _Follower(rig)
        clock_start, wall = rig.sim.clock, time.perf_counter()
        result = runner.calibrate(rig, config, Path(tmp) / "calibrate", store=store,
                                  observer=follower)
        record["calibrate"] = _stage_record(result, follower, rig, clock_start,
                                            time.perf_counter() - wall,
                                            Path(tmp) / "calibrate" / JOURNAL_NAME)
        if job.get("retune"):
            if not result["accepted"]:
                record["retune"] = {"skipped": "calibration not accepted, no last good setting"}
            else:
                rig.thermal_step(THERMAL_STEP_HZ)
                before = final_truth(rig, result["setpoints"])
                follower = _Follower(rig)
                clock_start, wall = rig.sim.clock, time.perf_counter()
                result = runner.retune(rig, config, Path(tmp) / "retune", store=store,
                                       observer=follower)
                stage = _stage_record(result, follower, rig, clock_start,
                                      time.perf_counter() - wall,
                                      Path(tmp) / "retune" / JOURNAL_NAME)
                stage["ratio_after_step"] = before["ratio"]
                # The blind spot the issue counts: the check passed on a peak that had moved.
                stage["moved_judged_still_good"] = bool(
                    result["status"] == "still_good" and before["ratio"] < THRESHOLD)
                record["retune"] = stage
    return record


def oracle_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """Verify at the true best set-points only: the shots and precision of that verification."""
    config = config_from_spec(job["config"])
    scenario = job["scenario"]
    rig = local_rig(job["rig"], scenario["perturbation"], scenario["rig_seed"])
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
            "final_ratio": final_truth(rig, result["setpoints"])["ratio"],
            "best_setpoints_at_start": {k: float(v) for k, v in best.items()},
            "best_inside_box_at_start": inside}


def from_json(text: str) -> Any:
    """Parse JSON that :func:`jsonable` prepared (a job's result, a study's file), with its
    infinities ("inf"/"-inf": a shot count never reached, a step never recovered) read back as
    floats: the one decoding of the study's JSON, so that records in memory hold numbers."""
    return json.loads(text, object_hook=_infinities)


def _infinities(obj: dict[str, Any]) -> dict[str, Any]:
    def back(value: Any) -> Any:
        if isinstance(value, str) and value in ("inf", "-inf"):
            return float(value)
        if isinstance(value, list):
            return [back(x) for x in value]
        return value
    return {key: back(value) for key, value in obj.items()}


def jsonable(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [jsonable(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else ("inf" if value > 0 else "-inf")
    return value
