"""The night rig: the simulated rig watched on a grid of rig time for its truth, the night's
thermal steps, and what a held night measures (time above the bar, delays to recover)."""

from __future__ import annotations

import copy
import dataclasses
import math
import tempfile
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from autotune.run import runner
from autotune.bench.jobs import config_from_spec, final_truth
from autotune.bench.plan import (LOWER_THRESHOLD, NIGHT_GRID_S, NIGHT_THERMAL_STEPS,
                                 THERMAL_STEP_HZ, THRESHOLD)
from autotune.bench.scenarios import local_rig


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


def hold_night_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """One night of a scenario: calibrate, then hold it with ``track`` or with today's schedule.

    The night lasts ``hours`` of rig time after the calibration, with the scenario's drift
    (no ramp on a quiet night) and its thermal steps (none on a quiet night).
    """
    from autotune.run import track as tracking

    config = config_from_spec(job["config"])
    scenario = job["scenario"]
    config = dataclasses.replace(config, search=dataclasses.replace(
        config.search, seed=scenario["search_seed"]))
    perturbation = copy.deepcopy(scenario["perturbation"])
    if job["quiet"]:
        perturbation.setdefault("drift", {})["ramp_hz_per_s"] = 0.0
    hours = float(job["hours"])
    rig = local_rig(job["rig"], perturbation, scenario["rig_seed"])
    steps = [] if job["quiet"] else [tuple(x) for x in job["steps"]]
    wall = time.perf_counter()
    record: dict[str, Any] = {"family": scenario["family"], "scenario": scenario["index"],
                              "method": job["method"], "interval_s": job.get("interval_s"),
                              "quiet": bool(job["quiet"]), "hours": hours}
    with tempfile.TemporaryDirectory(prefix="autotune-bench-hold-") as tmp:
        store = Path(tmp) / "last-good.json"
        result = runner.calibrate(rig, config, Path(tmp) / "calibrate", store=store)
        truth = final_truth(rig, result["setpoints"])
        record["calibration"] = {"status": result["status"], "shots": int(result["shots"]),
                                 "final_ratio": truth["ratio"],
                                 "final_true_best": truth["best"],
                                 "inversion": result.get("inversion"),
                                 "min_inversion": float(config.min_inversion),
                                 "reason": result.get("reason") or ""}
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
            # The night's outlook before its first check (hold_outlook.StepOutlook's numbers).
            record["step_outlook"] = outcome.get("step_outlook")
            # The last outlook told (a later plan's, when its time to confirm crossed the line).
            record["last_step_outlook"] = outcome.get("last_step_outlook")
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
    from autotune.run.records import Hold, decisions, of_type, parse_all

    typed = parse_all(read_journal(run_dir / "journal.jsonl"))
    clocks = {r.get("point"): r.get("clock_s") for r in of_type(typed, Hold)}
    return [float(clocks[r.get("point")]) for r in decisions(typed, "alarm")
            if r.get("point") in clocks]


def _night_plans(run_dir: Path) -> list[dict[str, Any]]:
    from autotune.run.journal import read_journal
    from autotune.run.records import decisions, parse_all

    return [{"interval_s": r.plan["interval_s"], "shots_per_phase": r.plan["shots_per_phase"],
             "check_share": r.plan["check_share"]}
            for r in decisions(parse_all(read_journal(run_dir / "journal.jsonl")), "plan")]
