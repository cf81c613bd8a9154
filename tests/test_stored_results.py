"""The stored quick check reproduces: the small study whose result is kept in
benchmarks/results/quick-check.json is run again the way benchmarks/README.md says, and the
numbers it stores (shots, points, ratios, verified inversions, decisions, target verdicts) must
come out the same. A change of the calibration, the retune or the simulated rig that moves one
of them fails here, naming the scenario and the number, with the command that regenerates the
stored file once the change is meant (then the README's tables are due too).

The study is deterministic for its seed: ``--serial`` runs every job in this process, each
scenario's rig and search seeded from the plan, the rig's clock simulated (two runs compared
whole, wall times aside, were identical). Counts, strings and decisions are compared exactly;
floating-point numbers to a relative 1e-9, room for a numpy or BLAS build that rounds its last
bits differently, far below any change of a strategy (which moves shots by whole measurements).
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from typing import Any

from rig_process import REPO

STORED = REPO / "benchmarks" / "results" / "quick-check.json"
#: The command that writes the stored file (benchmarks/README.md), as the study records it.
REGENERATE = "python -m autotune.bench --tiny --calibration-only --strategies phase_lock --families main,mismatch --serial --quiet --out benchmarks/results/quick-check.json"
#: The numbers of a stage compared (autotune.bench's stage result).
STAGE_KEYS = ("status", "accepted", "points", "shots", "setpoints", "verified_inversion",
              "final_ratio", "true_shortfall", "predicted_shortfall_upper", "reached",
              "shots_to_threshold", "ratio_after_step", "moved_judged_still_good")
ORACLE_KEYS = ("verification_shots", "total_shots", "verified_inversion", "final_ratio")
REL_TOL = 1e-9


def _compared(study: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """Scenario label -> {quantity: value} of every number the check compares."""
    found: dict[str, dict[str, Any]] = {}
    for run in study["runs"]:
        label = f"{run['family']} scenario {run['scenario']} ({run['strategy']})"
        for stage in ("calibrate", "retune"):
            result = run.get(stage) or {}
            found.setdefault(label, {}).update(
                {f"{stage}.{key}": result[key] for key in STAGE_KEYS if key in result})
    for run in study["oracle"]["runs"]:
        found[f"{run['family']} scenario {run['scenario']} (oracle floor)"] = {
            key: run[key] for key in ORACLE_KEYS}
    found["targets"] = {target["name"]: target["status"] for target in study["targets"]}
    return found


def _same(stored: Any, fresh: Any) -> bool:
    if isinstance(stored, dict) and isinstance(fresh, dict):
        return stored.keys() == fresh.keys() and all(_same(stored[k], fresh[k]) for k in stored)
    if isinstance(stored, float) and isinstance(fresh, float) and not isinstance(fresh, bool):
        return math.isclose(stored, fresh, rel_tol=REL_TOL, abs_tol=1e-12)
    return type(stored) is type(fresh) and stored == fresh


def _drift(stored: dict[str, dict[str, Any]], fresh: dict[str, dict[str, Any]]) -> list[str]:
    """One line per quantity that differs: scenario, quantity, stored and new value."""
    lines = [f"{label}: {'not in the new run' if label not in fresh else 'new'}"
             for label in sorted(stored.keys() ^ fresh.keys())]
    for label in sorted(stored.keys() & fresh.keys()):
        old, new = stored[label], fresh[label]
        for key in sorted(old.keys() | new.keys()):
            if not _same(old.get(key), new.get(key)):
                lines.append(f"{label}: {key}: stored {old.get(key)!r}, now {new.get(key)!r}")
    return lines


def test_the_stored_quick_check_reproduces(tmp_path):
    """The documented command, run again into a temporary file, gives the stored numbers."""
    out = tmp_path / "quick-check.json"
    argv = [sys.executable, *REGENERATE.split()[1:-1], str(out)]
    done = subprocess.run(argv, cwd=REPO, capture_output=True, text=True, timeout=900,
                          check=False)
    assert done.returncode == 0, done.stderr[-3000:]
    drifted = _drift(_compared(json.loads(STORED.read_text(encoding="utf-8"))),
                     _compared(json.loads(out.read_text(encoding="utf-8"))))
    assert not drifted, (
        f"the stored quick check ({STORED.relative_to(REPO)}) no longer reproduces "
        f"({len(drifted)} numbers moved):\n  " + "\n  ".join(drifted[:40])
        + f"\nIf the change is meant, regenerate it (about a minute on 2 cores) with:\n"
        f"  {REGENERATE}\nand the README's tables with the commands of benchmarks/README.md.")


def test_the_stored_check_names_its_command_and_commit():
    """The stored file was written by the command benchmarks/README.md documents, records the
    commit it ran on, and compares something: accepted calibrations and retunes."""
    stored = json.loads(STORED.read_text(encoding="utf-8"))
    assert stored["command"] == REGENERATE
    assert REGENERATE in (REPO / "benchmarks" / "README.md").read_text(encoding="utf-8")
    commit = stored["code"]["commit"]
    assert isinstance(commit, str) and len(commit) == 40 and int(commit, 16) >= 0
    compared = _compared(stored)
    stages = [values for label, values in compared.items() if "(phase_lock)" in label]
    assert len(stages) == 2 and all(values["calibrate.shots"] > 0 and "retune.shots" in values
                                    for values in stages)


def test_a_drift_names_the_scenario_and_the_number():
    """The comparison itself: a moved shot count and a flipped decision are each named; a
    last-bit difference of a ratio is not (relative 1e-9)."""
    stored = {"main scenario 0 (phase_lock)": {"calibrate.shots": 144552,
                                               "calibrate.accepted": True,
                                               "calibrate.final_ratio": 0.9992211451794477}}
    fresh = {"main scenario 0 (phase_lock)": {"calibrate.shots": 150552,
                                              "calibrate.accepted": False,
                                              "calibrate.final_ratio": 0.9992211451794478}}
    assert _drift(stored, fresh) == [
        "main scenario 0 (phase_lock): calibrate.accepted: stored True, now False",
        "main scenario 0 (phase_lock): calibrate.shots: stored 144552, now 150552"]
    assert _drift(stored, {}) == ["main scenario 0 (phase_lock): not in the new run"]
