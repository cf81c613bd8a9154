"""Smoke test of the benchmark runner (autotune.bench) at tiny sizes, in this process."""

from __future__ import annotations

import dataclasses
import json
import math
import statistics

import numpy as np
import pytest

from autotune import bench


@pytest.fixture(scope="module")
def study():
    """One tiny study: one scenario, Bayesian search and the 3 x 3 grid, a short night."""
    plan = dataclasses.replace(bench.plan_for("tiny", workers=1), strategies=("bayesian", "grid"),
                               night_steps=4, overhead_points=(10,))
    return bench.run_study(plan)


def test_quantiles_match_numpy_linear_percentiles():
    """Without failures the quantiles are numpy's linear-interpolation percentiles."""
    values = [3.0, 1.0, 4.0, 1.0, 5.0, 9.0, 2.0, 6.0]
    # Reference: numpy.percentile, method "linear" (its default).
    assert bench.quantiles(values) == pytest.approx(np.percentile(values, [25, 50, 75]))


def test_quantiles_count_failures_as_infinite():
    """A quantile that interpolates towards a failure (None) is infinite, one below it is not."""
    # Reference: statistics.median of the same data with the failure as +inf is 2; the lower
    # quartile is numpy's linear percentile of the finite part below the median.
    low, median, high = bench.quantiles([1.0, 2.0, None])
    assert median == pytest.approx(statistics.median([1.0, 2.0, math.inf]))
    assert low == pytest.approx(np.percentile([1.0, 2.0, 3.0], 25))
    assert math.isinf(high)


def test_scenarios_lie_in_the_stated_ranges_and_repeat_with_the_seed():
    """Scenarios are uniform draws inside SCENARIO_RANGES, identical for the same seed."""
    first = bench.make_scenarios(12, seed=5)
    assert first == bench.make_scenarios(12, seed=5)
    for (section, key), (low, high) in bench.SCENARIO_RANGES.items():
        values = [s["perturbation"][section][key] for s in first]
        assert all(low <= v <= high for v in values)
        # Not one hand-picked value repeated: twelve uniform draws are distinct.
        assert len(set(values)) == 12


def test_grid_finishes_its_design(study):
    """The grid run measures all 3 x 3 points of its design, the budget raised to allow it."""
    grid = [r["calibrate"] for r in study["runs"] if r["strategy"] == "grid"]
    assert [r["points"] for r in grid] == [3 * 3]


def test_shots_to_threshold_are_whole_points(study):
    """Shots to the threshold are a whole number of points of 2 fields x phases x shots each."""
    m = study["strategies"]["bayesian"]
    per_point = 2 * m["ramsey_phases"] * m["shots_per_phase"]
    for run in study["runs"]:
        c = run["calibrate"]
        if c["reached"]:
            assert c["shots_to_threshold"] == c["points_to_threshold"] * per_point


def test_rig_time_covers_the_acquisitions(study):
    """Rig time to the threshold is at least shots / repetition rate (PHYSICS.md section 4)."""
    rate = study["overhead"]["repetition_rate_hz"]
    for run in study["runs"]:
        c = run["calibrate"]
        if c["reached"]:
            assert c["rig_time_to_threshold_s"] >= c["shots_to_threshold"] / rate * (1 - 1e-9)


def test_final_true_inversion_does_not_beat_the_true_best(study):
    """The truth's best is a maximum over the set-points, so no final ratio exceeds one."""
    for run in study["runs"]:
        # 0.5 % slack: the truth's best comes from a local refinement of a coarse map.
        assert run["calibrate"]["final_ratio"] <= 1.005


def test_oracle_floor_is_the_verification_alone(study):
    """The oracle floor is 2 fields x phases x verification shots per phase."""
    m = study["strategies"]["bayesian"]
    assert study["oracle"]["shots"] == 2 * m["ramsey_phases"] * m["verification_shots_per_phase"]


def test_missed_targets_are_said_plainly(study):
    """Every target appears in the table with 'met' or 'MISSED' as measured."""
    table = bench.format_table(study)
    for target in study["targets"]:
        assert f"[{'met' if target['met'] else 'MISSED'}] {target['name']}" in table


def test_result_file_is_strict_json(study, tmp_path):
    """The result file parses as JSON without NaN or Infinity (RFC 8259 has neither)."""
    path = tmp_path / "result.json"
    bench.write_result(study, path)

    def refuse(token: str) -> None:
        raise AssertionError(f"non-standard JSON constant {token}")

    data = json.loads(path.read_text(encoding="utf-8"), parse_constant=refuse)
    assert data["mode"] == "tiny"


def test_table_reprints_from_the_result_file(study, tmp_path, capsys):
    """``--show FILE`` prints the same table from the file as the run printed from memory."""
    path = tmp_path / "result.json"
    bench.write_result(study, path)
    assert bench.main(["--show", str(path)]) == 0
    assert capsys.readouterr().out.rstrip("\n") == bench.format_table(study)


def test_show_of_a_missing_file_is_a_clear_error(tmp_path, capsys):
    """A result file that is not there is refused with its name, exit code 2."""
    missing = tmp_path / "nope.json"
    assert bench.main(["--show", str(missing)]) == 2
    assert str(missing) in capsys.readouterr().err
