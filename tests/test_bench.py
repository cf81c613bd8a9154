"""Smoke test of the benchmark runner (autotune.bench) at tiny sizes, in this process and on
dask clusters; the scenario families; the targets of the guided strategy; the night study."""

from __future__ import annotations

import dataclasses
import json
import math
import statistics
import subprocess
import sys

import numpy as np
import pytest

from autotune import bench
from autotune.bench import night_rig as bench_night_rig
from autotune.bench import night_study as bench_night_study
from autotune.bench import study as bench_study
from autotune.bench import summaries as bench_summaries
from autotune.bench import tables as bench_tables
from autotune.bench import targets as bench_targets

# The main and the mismatch family: the held-out one is the main one with another seed.
TINY = dataclasses.replace(bench.plan_for("tiny", workers=1), strategies=("bayesian", "grid"),
                           families=("main", "mismatch"), night_steps=4, overhead_points=(10,),
                           night_study=False)
#: The night study alone at its tiny size: one scenario, a night of 1.5 h.
TINY_NIGHT = bench.plan_for("tiny", workers=1, night_only=True)


#: The tests that read one of the two module-scoped studies run on one worker each
#: (pytest-xdist's loadgroup), so that each study is built once; the calibration study and the
#: night study are two groups, built side by side on two workers, and the tests that read
#: neither go to any worker.
_READS_STUDY = pytest.mark.xdist_group("test_bench_study")
_READS_NIGHT_STUDY = pytest.mark.xdist_group("test_bench_night_study")


@pytest.fixture(scope="module")
def study():
    """One tiny study in this process: one scenario per family, Bayesian search (then a retune)
    and the 3 x 3 grid, a short night."""
    return bench.run_study(TINY)


def _without_wall_times(value):
    if isinstance(value, dict):
        return {k: _without_wall_times(v) for k, v in value.items() if not k.startswith("wall")}
    if isinstance(value, list):
        return [_without_wall_times(v) for v in value]
    return value


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


def test_a_family_seed_offset_gives_development_draws_of_the_fixed_families():
    """``--family-seed-offset N`` moves every fixed family's seed by N (the main draw keeps
    ``--seed``); 0 is the study's own draw."""
    # Source: the issue's rule (never tune to a study family's draws: develop on draws it does not report).
    plan = bench.plan_for("full", scenarios=2)
    dev = dataclasses.replace(plan, family_seed_offset=7)
    for name in ("held_out", "mismatch", "velocity_physics", "velocity_physics_held_out",
                 "zones_set_once", "zones_set_once_held_out"):
        assert bench.family_seed(plan, name) == bench.FAMILIES[name].seed
        assert bench.family_seed(dev, name) == bench.FAMILIES[name].seed + 7
    assert bench.family_seed(dev, "main") == plan.seed
    assert (bench.family_scenarios(dev)["velocity_physics"][0]["perturbation"]
            != bench.family_scenarios(plan)["velocity_physics"][0]["perturbation"])


def test_the_family_seed_offset_option_reaches_the_study_plan(monkeypatch):
    """``python -m autotune.bench --family-seed-offset 5`` hands the study a plan whose fixed
    families draw from their seeds plus 5 (the study itself is not run here)."""
    # Source: argparse (Python documentation): an int option's value; the plan is what run_study reads.
    from autotune.bench import command

    seen = {}

    class _Stop(Exception):
        pass

    def capture(plan, **kwargs):
        seen["plan"] = plan
        raise _Stop

    monkeypatch.setattr(command, "run_study", capture)
    with pytest.raises(_Stop):
        bench.main(["--tiny", "--serial", "--quiet", "--calibration-only", "--strategies", "phase_lock",
                    "--families", "velocity_physics", "--family-seed-offset", "5"])
    assert seen["plan"].family_seed_offset == 5
    assert bench.family_seed(seen["plan"], "velocity_physics") == bench.FAMILIES["velocity_physics"].seed + 5


def test_held_out_draw_has_the_main_ranges_and_its_own_fixed_seed():
    """The held-out family draws the main ranges from a seed fixed in the code, not the plan's."""
    # Source: the issue's held-out rule (same ranges, another generator seed, never tuned on).
    plan = bench.plan_for("full")
    assert bench.FAMILIES["held_out"].ranges == bench.SCENARIO_RANGES
    assert bench.family_seed(plan, "held_out") == bench.HELD_OUT_SEED != plan.seed
    assert bench.family_seed(dataclasses.replace(plan, seed=5), "held_out") == bench.HELD_OUT_SEED
    held_out = bench.family_scenarios(plan)["held_out"]
    main = bench.family_scenarios(plan)["main"]
    assert [s["perturbation"] for s in held_out] != [s["perturbation"] for s in main]
    for (section, key), (low, high) in bench.SCENARIO_RANGES.items():
        assert all(low <= s["perturbation"][section][key] <= high for s in held_out)


def test_mismatch_draw_has_both_profiles_and_checked_rig_configs():
    """Mismatch scenarios draw each non-Gaussian profile with its parameter in range, a Stark
    error beyond the main range, and every one is a valid simulated-rig configuration."""
    # Reference: drivers_sim.config.sim_config_from_dict (the rig's own checks); scipy.stats'
    # binomial test that the two profiles are drawn equally often (60 draws, alpha 1e-3).
    import scipy.stats
    from drivers_sim.config import load_sim_config, sim_config_from_dict

    scenarios = bench.make_scenarios(60, bench.MISMATCH_SEED, bench.FAMILIES["mismatch"])
    demo = load_sim_config(bench.DEFAULT_RIG_CONFIG).to_dict()
    kinds = []
    for scenario in scenarios:
        cavity = scenario["perturbation"]["cavity"]
        kinds.append(cavity["mode_profile"])
        key, (low, high) = bench.MISMATCH_PROFILES[cavity["mode_profile"]]
        assert low <= cavity[key] <= high
        other = {k for k, _ in bench.MISMATCH_PROFILES.values()} - {key}
        assert not other & set(cavity)
        data = json.loads(json.dumps(demo))
        for section, values in scenario["perturbation"].items():
            data[section].update(values)
        config = sim_config_from_dict(data)
        assert config.cavity.profile.kind == cavity["mode_profile"]
    assert scipy.stats.binomtest(kinds.count("asymmetric"), len(kinds)).pvalue > 1e-3
    errors = [s["perturbation"]["stark"]["coefficient_error"] for s in scenarios]
    assert max(abs(e) for e in errors) > 0.03  # beyond the main range (+-0.03)
    assert all(abs(e) <= 0.15 for e in errors)


def test_zones_set_once_draws_the_velocity_physics_ranges_and_the_zones_velocity_in_the_box():
    """The zones-set-once family and its held-out twin: the velocity-physics ranges plus
    ramsey.power_set_velocity_m_per_s over the run config's velocity box, each from its own
    fixed seed, distinct from every other family's."""
    # Source: the issue's rule (a family of its own, a held-out draw with another seed) and the
    # study's run config (configs/dry-run.toml, the velocity box 460-560 m/s).
    from autotune.config import load_config

    box = {sp.name: (sp.search_min, sp.search_max)
           for sp in load_config(bench.DEFAULT_RUN_CONFIG).setpoints}["velocity"]
    family, twin = bench.FAMILIES["zones_set_once"], bench.FAMILIES["zones_set_once_held_out"]
    assert family.ranges == twin.ranges
    assert dict(family.ranges) == {**bench.FAMILIES["velocity_physics"].ranges,
                                   ("ramsey", "power_set_velocity_m_per_s"): box}
    seeds = [f.seed for f in bench.FAMILIES.values() if f.seed is not None]
    assert len(set(seeds)) == len(seeds)
    scenarios = bench.make_scenarios(20, family.seed, family)
    values = [s["perturbation"]["ramsey"]["power_set_velocity_m_per_s"] for s in scenarios]
    assert all(box[0] <= v <= box[1] for v in values) and len(set(values)) == 20
    assert ([s["perturbation"] for s in bench.make_scenarios(3, twin.seed, twin)]
            != [s["perturbation"] for s in scenarios[:3]])


def test_zones_set_once_reaches_the_rig_and_moves_the_truths_best():
    """A drawn zones-set-once scenario is a valid simulated rig whose zones' power is set at
    the drawn velocity, and its true best moves towards that velocity and falls, against the
    same scenario with the power following the set velocity (the velocity-physics rig)."""
    # Reference: drivers_sim.config.sim_config_from_dict (the rig's own checks) and the rig's
    # truth through the wire protocol (bench's local_rig, as the study builds it); physics:
    # docs/physics.md section 3 (both fringes times sin^2 theta, theta = (pi / 2) v_set / v,
    # which peaks at v_set: the product's maximum moves towards v_set and cannot rise).
    from autotune.bench.scenarios import local_rig, rig_data
    from drivers_sim.config import sim_config_from_dict

    rig = rig_data(bench.DEFAULT_RIG_CONFIG)
    scenario = bench.make_scenarios(1, bench.FAMILIES["zones_set_once"].seed,
                                    bench.FAMILIES["zones_set_once"])[0]
    perturbation = scenario["perturbation"]
    v_set = perturbation["ramsey"]["power_set_velocity_m_per_s"]
    data = json.loads(json.dumps(rig["data"]))
    for section, values in perturbation.items():
        data[section].update(values)
    assert sim_config_from_dict(data).ramsey.power_set_velocity_m_per_s == v_set
    without = json.loads(json.dumps(perturbation))
    del without["ramsey"]["power_set_velocity_m_per_s"]
    once = local_rig(rig, perturbation, scenario["rig_seed"]).truth()["best"]
    every = local_rig(rig, without, scenario["rig_seed"]).truth()["best"]
    v_once, v_every = once["setpoints"]["velocity"], every["setpoints"]["velocity"]
    assert abs(v_every - v_set) > 2.0  # the draw is not at the best already
    assert v_once != pytest.approx(v_every, abs=0.5)
    assert (v_once - v_every) * (v_set - v_every) > 0
    assert once["inversion"] < every["inversion"]


def test_main_draw_is_unchanged_by_the_families():
    """The main family draws exactly what make_scenarios drew before families existed."""
    # Reference: the draw written out here with numpy's SeedSequence([seed, k]), the ranges in
    # order, then the two seeds (the documented order of make_scenarios).
    rng = np.random.default_rng(np.random.SeedSequence([20261205, 3]))
    expected = {section: {} for section, _ in bench.SCENARIO_RANGES}
    for (section, key), (low, high) in bench.SCENARIO_RANGES.items():
        expected[section][key] = float(rng.uniform(low, high))
    seeds = [int(x) for x in rng.integers(0, 2**31 - 1, size=2)]
    scenario = bench.make_scenarios(4, 20261205)[3]
    assert scenario["perturbation"] == expected
    assert [scenario["rig_seed"], scenario["search_seed"]] == seeds


@_READS_STUDY
def test_study_covers_every_family_and_strategy(study):
    """Every family has every strategy's calibration, its oracle runs, and retunes of the Bayesian one."""
    # Source: the study's plan (TINY above).
    for family in TINY.families:
        assert set(study["summary"][family]) == set(TINY.strategies)
        assert study["oracle"]["families"][family]["scenarios"] == TINY.scenarios
        assert set(study["retune"][family]) == {"bayesian"}
        assert {s["index"] for s in study["scenarios"][family]} == set(range(TINY.scenarios))
    assert len(study["runs"]) == len(TINY.families) * TINY.scenarios * len(TINY.strategies)


@_READS_STUDY
def test_whole_stage_shots_are_what_the_stage_measured(study):
    """A stage's shots are its points plus the detuning scan plus the verification, in whole fringes."""
    # Source: the measurement of docs/physics.md section 5 (2 fields x phases x shots per phase).
    m = study["strategies"]["grid"]
    per_point = 2 * m["ramsey_phases"] * m["shots_per_phase"]
    verification = 2 * m["ramsey_phases"] * m["verification_shots_per_phase"]
    refine = study["search_configs"]["grid"].get("refine_points", 0)
    for run in study["runs"]:
        if run["strategy"] == "grid":
            c = run["calibrate"]
            assert c["shots"] == (c["points"] + refine) * per_point + verification


@_READS_STUDY
def test_shots_by_purpose_add_up_to_the_stage_and_name_the_verification(study):
    """Where the shots went: the journal's tally by purpose adds up to the stage's shots, and a
    grid's verification is one fringe pair at the verification's shots."""
    # Source: the measurement of docs/physics.md section 5 (2 fields x phases x shots per phase).
    m = study["strategies"]["grid"]
    verification = 2 * m["ramsey_phases"] * m["verification_shots_per_phase"]
    for run in study["runs"]:
        for stage in ("calibrate", "retune"):
            record = run.get(stage) or {}
            if "shots" not in record:
                continue
            assert sum(record["shots_by_purpose"].values()) == record["shots"], (run["family"], stage)
        if run["strategy"] == "grid":
            assert run["calibrate"]["shots_by_purpose"]["verify"] == verification


@_READS_STUDY
def test_shots_by_purpose_rows_are_numpy_medians(study):
    """The printed breakdown's medians are numpy's (0 for a stage without that purpose)."""
    rows = bench_tables.shots_by_purpose_rows(study)
    for run_family, by_strategy in rows.items():
        for strategy, row in by_strategy.items():
            records = [r["calibrate"]["shots_by_purpose"] for r in study["runs"]
                       if r["family"] == run_family and r["strategy"] == strategy]
            for purpose, value in row.items():
                if purpose != "stages":
                    assert value == float(np.median([r.get(purpose, 0) for r in records]))
    assert "1b. where a calibration's shots went" in bench.format_table(study)


@_READS_STUDY
def test_failures_at_both_bars_count_the_final_ratios(study):
    """The columns '<0.98' and '<0.97' count the scenarios whose final true ratio is below each bar."""
    # Source: the issue's definition (failures counted at 0.98 and at 0.97 of the true best).
    for family in TINY.families:
        for kind in TINY.strategies:
            finals = [r["calibrate"]["final_ratio"] for r in study["runs"]
                      if r["family"] == family and r["strategy"] == kind]
            row = study["summary"][family][kind]
            assert row["below_threshold"] == sum(f < 0.98 for f in finals)
            assert row["below_lower_threshold"] == sum(f < 0.97 for f in finals)


@_READS_STUDY
def test_moved_peak_judged_still_good_is_a_passed_check_below_98(study):
    """A retune counts as 'moved, judged still good' exactly when its check passed and the old
    set-points were below 98 % of the new best right after the step."""
    # Source: the issue's definition of the count.
    for run in study["runs"]:
        r = run.get("retune")
        if r and "skipped" not in r:
            assert r["moved_judged_still_good"] == (
                r["status"] == "still_good" and r["ratio_after_step"] < 0.98)


@_READS_STUDY
def test_grid_finishes_its_design(study):
    """The grid run measures all 3 x 3 points of its design, the budget raised to allow it."""
    grid = [r["calibrate"] for r in study["runs"] if r["strategy"] == "grid"]
    assert [r["points"] for r in grid] == [3 * 3] * len(TINY.families)


@_READS_STUDY
def test_shots_to_threshold_are_whole_points(study):
    """Shots to the threshold are a whole number of points of 2 fields x phases x shots each."""
    m = study["strategies"]["bayesian"]
    per_point = 2 * m["ramsey_phases"] * m["shots_per_phase"]
    for run in study["runs"]:
        c = run["calibrate"]
        if c["reached"]:
            assert c["shots_to_threshold"] == c["points_to_threshold"] * per_point


@_READS_STUDY
def test_rig_time_covers_the_acquisitions(study):
    """Rig time to the threshold is at least shots / repetition rate (docs/physics.md section 4)."""
    rate = study["overhead"]["repetition_rate_hz"]
    for run in study["runs"]:
        c = run["calibrate"]
        if c["reached"]:
            assert c["rig_time_to_threshold_s"] >= c["shots_to_threshold"] / rate * (1 - 1e-9)


@_READS_STUDY
def test_final_true_inversion_does_not_beat_the_true_best(study):
    """The truth's best is a maximum over the set-points, so no final ratio exceeds one."""
    for run in study["runs"]:
        # 0.5 % slack: the truth's best comes from a local refinement of a coarse map.
        assert run["calibrate"]["final_ratio"] <= 1.005


@_READS_STUDY
def test_oracle_floor_is_the_verification_alone(study):
    """The oracle floor is 2 fields x phases x verification shots per phase."""
    m = study["strategies"]["bayesian"]
    assert study["oracle"]["shots"] == 2 * m["ramsey_phases"] * m["verification_shots_per_phase"]


@_READS_STUDY
def test_missed_targets_are_said_plainly(study):
    """Every target appears in the table with 'met', 'MISSED' or 'not run' as measured."""
    table = bench.format_table(study)
    for target in study["targets"]:
        expected = "not run" if target["met"] is None else "met" if target["met"] else "MISSED"
        assert f"[{expected}] {target['name']}" in table


@_READS_STUDY
def test_guided_targets_say_not_run_without_the_guided_strategy(study):
    """Without phase_lock in the run, each of its seven targets is printed as 'not run'."""
    # Source: the issue's list of the guided strategy's targets (seven kinds).
    guided = [t for t in study["targets"] if t["name"].startswith(bench.GUIDED)]
    assert len(guided) == 7
    assert all(t["status"] == "not run" and t["met"] is None for t in guided)


def _row(stage_shots, finals, reached=True):
    return [{"shots": stage_shots, "final_ratio": f, "shots_to_threshold": stage_shots // 2,
             "rig_time_to_threshold_s": 1.0, "reached": reached, "points": 5,
             "status": "accepted", "verified_stderr": 0.01} for f in finals]


def test_guided_targets_follow_the_issue_thresholds():
    """The guided targets apply the issue's bars: 2x the floor, 19 of 20 at 0.98, all at 0.97,
    8x fewer than the coordinate scan at equal or better quality, and the retune's three."""
    # Source: issue 10's targets, applied to made-up figures on either side of each bar.
    floor = 72_000.0
    good = [0.99] * 19 + [0.975]
    summary = {"main": {
        bench.GUIDED: bench_summaries.summarise(_row(143_000, good), floor),
        "coordinate": bench_summaries.summarise(_row(1_170_000, [0.99] * 18 + [0.975] * 2), floor)}}
    retunes = [{"retune": {**row, "ratio_after_step": 0.85, "moved_judged_still_good": False},
                "calibrate": {"shots": 143_000}} for row in _row(100_000, good)]
    retune = {"main": {bench.GUIDED: bench_summaries.summarise_retunes(retunes, floor)}}
    targets = bench_targets.guided_targets(summary, retune, ["main"], run=True)
    assert [t["status"] for t in targets] == ["met"] * 7
    # One more scenario below 0.98, one below 0.97, a stage 2.1x the floor, a retune 1.6x it.
    worse = [0.99] * 18 + [0.975, 0.965]
    summary["main"][bench.GUIDED] = bench_summaries.summarise(_row(151_200, worse), floor)
    retunes[0]["retune"]["moved_judged_still_good"] = True
    retunes = [{**r, "retune": {**r["retune"], "shots": 115_200}} for r in retunes]
    retune["main"][bench.GUIDED] = bench_summaries.summarise_retunes(retunes, floor)
    targets = bench_targets.guided_targets(summary, retune, ["main"], run=True)
    assert [t["status"] for t in targets] == ["MISSED", "MISSED", "MISSED", "MISSED", "MISSED",
                                              "met", "MISSED"]


def test_unknown_strategy_is_refused_before_anything_runs(capsys):
    """A strategy the loop does not know is refused by the command, naming it, exit code 2."""
    # Source: DEVELOPERS.md habit 5 (check input once; say what was expected and what was received).
    with pytest.raises(SystemExit) as caught:
        bench.main(["--tiny", "--serial", "--strategies", "bayesian,simplex"])
    assert caught.value.code == 2
    assert "'simplex'" in capsys.readouterr().err


def test_serial_and_scheduler_options_exclude_each_other(capsys):
    """--serial with --scheduler is a usage error, exit code 2."""
    # Source: argparse's usage errors exit with status 2 (Python documentation).
    with pytest.raises(SystemExit) as caught:
        bench.main(["--tiny", "--serial", "--scheduler", "tcp://127.0.0.1:1"])
    assert caught.value.code == 2
    assert "--serial" in capsys.readouterr().err


@pytest.mark.parametrize(("argv", "named"), [
    (["--calibration-only", "--night"], "--calibration-only"),
    (["--families", "main,nosuch"], "'nosuch'"),
    (["--families", ","], "at least one family"),
])
def test_calibration_only_and_families_are_checked_before_anything_runs(capsys, argv, named):
    """The calibration study's options: a contradiction or an unknown family is a usage error
    naming what was wrong, exit code 2, before a cluster starts."""
    # Source: argparse's usage errors exit with status 2 (Python documentation).
    with pytest.raises(SystemExit) as caught:
        bench.main(["--tiny", "--serial", *argv])
    assert caught.value.code == 2
    assert named in capsys.readouterr().err


def test_importing_autotune_pulls_in_neither_dask_nor_the_simulator():
    """`import autotune` and `import autotune.bench` load neither dask nor drivers_sim."""
    # Source: DEVELOPERS.md (autotune never imports drivers_sim except where a study starts it) and
    # the issue (dask imported lazily inside the study); checked in a fresh interpreter.
    code = ("import sys, autotune, autotune.bench; "
            "print(sorted(m for m in sys.modules if m.split('.')[0] in "
            "('dask', 'distributed', 'drivers_sim')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120, check=True).stdout
    assert out.strip() == "[]"


# The two cluster runs (a local cluster the study starts, and a running scheduler) are in the
# slow suite, which .ci/run runs: each starts dask worker processes that import the whole
# stack, about a third of this file's CPU. The default suite keeps the job that fails in a
# fresh interpreter and the unreachable scheduler.
@pytest.mark.slow
@_READS_STUDY
def test_local_dask_cluster_gives_the_serial_results(study):
    """Two dask worker processes give exactly the serial run's calibrations, oracles and retunes."""
    # Reference: the same jobs run in this process (the module's study); every job is seeded,
    # so only wall times may differ.
    # The main family alone (both strategies, the retunes, the oracles): the mismatch family's
    # jobs travel the same way, and the cluster run costs half as much (129 s of a loaded
    # machine for both families). Summaries are computed here from what the jobs return, over
    # the families run, so the jobs' own results are compared.
    plan = dataclasses.replace(TINY, workers=2, night_steps=0, overhead_points=(),
                               families=("main",))
    on_cluster = bench.run_study(plan)
    assert on_cluster["machine"]["ran_on"].startswith("local dask cluster")

    def main_only(runs):
        return _without_wall_times([r for r in runs if r["family"] == "main"])

    assert on_cluster["runs"] and main_only(on_cluster["runs"]) == main_only(study["runs"])
    assert any("retune" in r for r in on_cluster["runs"])
    assert on_cluster["scenarios"]["main"] == study["scenarios"]["main"]
    assert main_only(on_cluster["oracle"]["runs"]) == main_only(study["oracle"]["runs"])


@pytest.mark.slow
def test_existing_scheduler_gives_the_serial_results():
    """Jobs sent to a running scheduler (--scheduler) give the serial run's results too."""
    # Reference: the same plan run in this process; a dask LocalCluster started here stands for
    # an existing cluster. The grid alone on the main family: a few seconds of serial jobs, so
    # that this test does not wait for the module's study on the study's worker.
    from distributed import LocalCluster

    plan = dataclasses.replace(TINY, strategies=("grid",), families=("main",), night_steps=0,
                               overhead_points=(), workers=2)
    serial = bench.run_study(dataclasses.replace(plan, workers=1))["runs"]
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None, death_timeout=120,
                      scheduler_kwargs={"dashboard": False,
                                        "dashboard_address": "127.0.0.1:0"}) as cluster:
        remote = bench.run_study(plan, scheduler=cluster.scheduler_address)
    assert remote["machine"]["ran_on"] == f"dask scheduler {cluster.scheduler_address}"
    assert remote["runs"] and _without_wall_times(remote["runs"]) == _without_wall_times(serial)


@_READS_STUDY
def test_result_file_is_strict_json(study, tmp_path):
    """The result file parses as JSON without NaN or Infinity (RFC 8259 has neither)."""
    path = tmp_path / "result.json"
    bench.write_result(study, path)

    def refuse(token: str) -> None:
        raise AssertionError(f"non-standard JSON constant {token}")

    data = json.loads(path.read_text(encoding="utf-8"), parse_constant=refuse)
    assert data["mode"] == "tiny"


@_READS_STUDY
def test_table_reprints_from_the_result_file(study, tmp_path, capsys):
    """``--show FILE`` prints the same table from the file as the run printed from memory."""
    path = tmp_path / "result.json"
    bench.write_result(study, path)
    assert bench.main(["--show", str(path)]) == 0
    assert capsys.readouterr().out.rstrip("\n") == bench.format_table(study)


def test_show_of_a_study_from_before_the_families_is_a_clear_error(tmp_path, capsys):
    """A study stored before the scenario families is refused in one line (exit 2), not
    printed by an untested table."""
    path = tmp_path / "old.json"
    path.write_text(json.dumps({"mode": "quick", "summary": {}, "command": "x"}),
                    encoding="utf-8")
    assert bench.main(["--show", str(path)]) == 2
    err = capsys.readouterr().err
    assert "before the scenario families" in err and str(path) in err


def test_show_of_a_missing_file_is_a_clear_error(tmp_path, capsys):
    """A result file that is not there is refused with its name, exit code 2."""
    missing = tmp_path / "nope.json"
    assert bench.main(["--show", str(missing)]) == 2
    assert str(missing) in capsys.readouterr().err


@pytest.mark.parametrize("name", ["latest.json", "quick.json", "night.json", "calibration.json"])
def test_stored_results_still_print(name, capsys):
    """The README's `--show benchmarks/results/latest.json` prints every stored result, old or new."""
    # Source: README, Performance (the command as written there, on the files the repo holds).
    path = bench.REPO / "benchmarks" / "results" / name
    assert bench.main(["--show", str(path)]) == 0
    assert capsys.readouterr().out.startswith("autotune benchmark (")


def test_job_in_a_subprocess_reports_its_failure():
    """A job run in a fresh interpreter (the night's, on a cluster) that fails raises with its error."""
    # Source: DEVELOPERS.md habit 6 (clear errors); the child's own message is passed on.
    with pytest.raises(RuntimeError, match="job kind: expected one of"):
        bench_study._run_job_in_subprocess(json.dumps({"kind": "nap"}), timeout_s=120.0)


def test_unreachable_scheduler_fails_within_its_bound(monkeypatch):
    """A scheduler address where nothing listens is an OSError once the connection bound passes."""
    # Source: DEVELOPERS.md habit 7 (every wait has a bound); port 1 on loopback has no listener
    # (tcpmux, unused on test machines: common practice).
    monkeypatch.setattr(bench_study, "CLUSTER_START_TIMEOUT_S", 2.0)
    plan = dataclasses.replace(TINY, strategies=("grid",), families=("main",), night_steps=0,
                               overhead_points=(), workers=2)
    with pytest.raises(OSError, match="127.0.0.1:1"):
        bench.run_study(plan, scheduler="tcp://127.0.0.1:1")


# --------------------------------------------------------------------------------------------
# The night study
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def night_study():
    """The night study alone at its tiny size, in this process."""
    return bench.run_study(TINY_NIGHT)


def test_fraction_of_the_night_counts_each_interval_at_its_lower_end():
    """Each interval between samples counts at the lower of its two ends, the last sample alone
    up to the end: [0, 60] at 0.90, [60, 90] at 0.90, [90, 100] at 0.98 (hand computation)."""
    samples = [(0.0, 0.99), (60.0, 0.90), (90.0, 0.98)]
    assert bench_night_rig._fraction_at(samples, 100.0, 0.97) == pytest.approx(10.0 / 100.0)
    assert bench_night_rig._fraction_at(samples, 100.0, 0.985) == pytest.approx(0.0)
    steady = [(0.0, 0.99), (50.0, 0.98)]
    assert bench_night_rig._fraction_at(steady, 100.0, 0.97) == pytest.approx(1.0)


def test_the_night_study_takes_every_family_of_the_registry(monkeypatch):
    """A plan's night families are read from bench.FAMILIES when it is made: a family added
    there is studied without naming it (the full and quick modes)."""
    assert bench.plan_for("full").night_families == tuple(bench.FAMILIES)
    extra = bench.ScenarioFamily("extra", 5, bench.SCENARIO_RANGES)
    monkeypatch.setitem(bench.FAMILIES, "extra", extra)
    assert "extra" in bench.plan_for("quick").night_families
    assert "extra" in bench.plan_for("full", night_only=True).night_families


def test_recovery_is_the_time_back_above_the_bar():
    """From each step to the first sample at or above the bar; 0 when the step never took the
    ratio below it; None when the night ended first (hand computation)."""
    samples = [(0.0, 0.99), (100.0, 0.80), (160.0, 0.95), (400.0, 0.98), (500.0, 0.85)]
    steps = [{"clock": 100.0}, {"clock": 0.0}, {"clock": 500.0}]
    assert bench_night_rig._recovery_delays(samples, steps, 0.97) == [300.0, 0.0, None]


def _skipped_night(quiet, true_best, inversion=None, min_inversion=0.5):
    """A night record of the family "vp" skipped for its calibration, as hold_night_job writes
    it (the verified inversion a little below the rig's true best unless given)."""
    return {"family": "vp", "scenario": 0, "method": "track", "quiet": quiet,
            "skipped": "calibration not accepted",
            "calibration": {"status": "below_acceptance", "shots": 1, "final_ratio": 0.99,
                            "final_true_best": true_best,
                            "inversion": true_best - 0.01 if inversion is None else inversion,
                            "min_inversion": min_inversion}}


def test_a_family_no_rig_of_which_reaches_the_floor_is_not_applicable():
    """No track night because no drawn rig reaches [acceptance] min_inversion at its true best:
    the three track targets say "not applicable" with the counts, not MISSED. A rig that
    reaches the floor but whose calibration verified below it (noise, or the tool) leaves
    them MISSED: the study's one rule for "not applicable" is the rig's truth."""
    # Source: issue 18's acceptance rule (verified inversion >= min_inversion) and issue 22's
    # targets, on made-up records.
    plan = dataclasses.replace(TINY_NIGHT, night_families=("vp",))
    floor = [_skipped_night(False, 0.41), _skipped_night(False, 0.38), _skipped_night(True, 0.40)]
    summary = bench_night_study.summarise_night(floor, plan, 0.05)
    assert summary["vp"]["track"]["below_min_inversion"] == 2
    rows = bench_night_study.night_targets(summary, plan, 0.05)
    track = [r for r in rows if "quiet" not in r["name"]]
    assert len(track) == 3 and all(r["status"] == "not applicable" and r["met"] is None
                                   for r in track)
    assert all("no drawn rig reaches min_inversion at its true best (2 of 2" in r["measured"]
               for r in track)
    for other in ([_skipped_night(False, 0.41), _skipped_night(False, 0.62),
                   _skipped_night(True, 0.4)],
                  [_skipped_night(False, 0.41), _skipped_night(False, 0.51, inversion=0.49),
                   _skipped_night(True, 0.4)]):
        rows = bench_night_study.night_targets(
            bench_night_study.summarise_night(other, plan, 0.05), plan, 0.05)
        assert [r["status"] for r in rows if "quiet" not in r["name"]] == ["MISSED"] * 3


def test_night_steps_are_seeded_and_leave_an_hour_to_recover():
    """Two +-15 kHz steps per night at uniform times before the night's last hour, the same for
    the same scenario."""
    scenarios = bench.make_scenarios(30, seed=11)
    for scenario in scenarios:
        steps = bench.night_steps(scenario, 8.0)
        assert steps == bench.night_steps(scenario, 8.0)
        assert len(steps) == 2 and all(abs(x) == 15e3 for _, x in steps)
        assert all(0.0 <= t <= 7.0 * 3600.0 for t, _ in steps)
    signs = {x > 0 for s in scenarios for _, x in bench.night_steps(s, 8.0)}
    assert signs == {True, False}


@_READS_NIGHT_STUDY
def test_the_night_study_runs_every_method_on_every_scenario(night_study):
    """track, both schedules and the quiet track ran on the scenario; the fractions lie in
    [0, 1]; the holding share is the night's acquisitions over its rig time."""
    runs = night_study["night_study"]["runs"]
    assert sorted(bench_night_study.night_label(r) for r in runs) == sorted(bench.night_labels())
    # A night whose calibration the tool would not vouch for is skipped, saying so (issue 18:
    # the tool accepts only what it can vouch for); the others are measured.
    assert any("skipped" not in r and r["method"] == "track" for r in runs)
    for run in runs:
        if "skipped" in run:
            assert run["skipped"] == "calibration not accepted"
            assert run["calibration"]["status"] != "accepted"
            assert run["calibration"]["reason"]   # the calibration's one-line reason, kept
            continue
        assert 0.0 <= run["fraction_098"] <= run["fraction_097"] <= 1.0
        assert 0.0 < run["holding_share"] < 1.0
        if run["method"] == "track":
            # The budget is a ceiling (issue 22), whatever the night.
            assert run["holding_share"] <= 0.05 + 1e-9
        assert run["night_rig_time_s"] >= TINY_NIGHT.night_hours * 3600.0
        if run["method"] == "track" and not run["quiet"]:
            assert len(run["steps"]) == 2 and len(run["recovery_s"]) == 2
        if run["quiet"]:
            assert run["steps"] == []


@_READS_NIGHT_STUDY
def test_the_night_targets_are_said_plainly(night_study):
    """Five issue-22 targets per night family (every night held, within the budget, the
    recovery, the quiet night, against the schedules), each met or MISSED, and the table prints
    them with section 6, the worst night and every night; --show reprints the same table."""
    targets = night_study["targets"]
    assert len(targets) == 5 and all(t["status"] in ("met", "MISSED") for t in targets)
    table = bench.format_table(night_study)
    assert "6. the night" in table and "schedule 120 min" in table
    assert "worst track night: scenario" in table and "nights over the 5% budget" in table
    for t in targets:
        assert f"[{t['status']}] {t['name']}" in table


def test_a_night_that_never_started_is_listed_with_its_reason():
    """The table names every night whose calibration was not accepted, with the calibration's
    figures and its one-line reason (issue 18: a refused stage says why; issue 22: every night
    of every family is shown), and says nothing of nights that ran. Made-up records."""
    from autotune.bench.tables import nights_not_run

    refused = {"family": "velocity_physics", "scenario": 1, "method": "track", "quiet": False,
               "skipped": "calibration not accepted",
               "calibration": {"status": "below_acceptance", "inversion": 0.492,
                               "final_true_best": 0.510, "final_ratio": 0.9995,
                               "reason": "verified inversion 0.492 below min_inversion 0.5"}}
    ran = {"family": "velocity_physics", "scenario": 0, "method": "track", "quiet": True,
           "calibration": {"status": "accepted"}}
    other = dict(refused, family="main")
    lines = nights_not_run([refused, ran, other], "velocity_physics")
    assert lines == ["    not run: scenario 1 track: calibration not accepted (below_acceptance; "
                     "verified 0.492, true best 0.510, 1.000 of it): verified inversion 0.492 "
                     "below min_inversion 0.5"]


@_READS_NIGHT_STUDY
def test_a_night_result_with_a_step_never_recovered_reprints(night_study, tmp_path, capsys):
    """A step that never recovered is an infinite recovery; the file stores it as "inf"
    (strict JSON, RFC 8259 has no infinity) and --show prints the same table as the study in
    memory instead of failing on the string."""
    import copy

    study = copy.deepcopy(night_study)
    family = study["night_study"]["families"][0]
    track = study["night_study"]["summary"][family]["track"]
    track["recovery_s_max"] = math.inf
    track["recovery_s_q"] = [track["recovery_s_q"][0], math.inf, math.inf]
    path = tmp_path / "night.json"
    bench.write_result(study, path)
    assert '"inf"' in path.read_text(encoding="utf-8")
    assert bench.main(["--show", str(path)]) == 0
    shown = capsys.readouterr().out.rstrip("\n")
    assert shown == bench.format_table(study)
    assert "recovery worst never" in shown and "never min" not in shown


@_READS_NIGHT_STUDY
def test_the_night_result_reprints_from_its_file(night_study, tmp_path, capsys):
    """A night-only result file is strict JSON and --show prints its table."""
    path = tmp_path / "night.json"
    bench.write_result(night_study, path)
    assert bench.main(["--show", str(path)]) == 0
    assert capsys.readouterr().out.rstrip("\n") == bench.format_table(night_study)


def test_night_only_plan_needs_a_study():
    """A plan with neither study is refused before anything runs."""
    plan = dataclasses.replace(TINY_NIGHT, night_study=False)
    with pytest.raises(ValueError, match="calibration study, the night study or both"):
        bench.check_plan(plan)



def _stage(final, upper, accepted=True, shots=150_000, reason="verified inversion 0.700"):
    return {"shots": shots, "final_ratio": final, "true_shortfall": 1.0 - final,
            "predicted_shortfall_upper": upper, "accepted": accepted, "reason": reason,
            "final_true_best": 0.7}


def test_confidence_counts_coverage_with_the_clopper_pearson_interval():
    """Coverage is the share of stages whose stated bound held, over calibrations and the
    retunes that ran, with the exact binomial interval."""
    # Source: Clopper & Pearson, Biometrika 26, 404 (1934): the exact interval's ends are the
    # beta quantiles B(a/2; k, n-k+1) and B(1-a/2; k+1, n-k), here from scipy.stats.beta.
    from scipy.stats import beta

    records = [{"calibrate": _stage(0.995, 0.010), "retune": _stage(0.990, 0.020)}
               for _ in range(8)]
    records[0]["calibrate"] = _stage(0.980, 0.012)            # shortfall 2 % above its 1.2 %
    records[1]["retune"] = {"skipped": "calibration not accepted, no last good setting"}
    c = bench_summaries.summarise_confidence(records, 72_000.0)
    n, k = 15, 14
    assert (c["stages"], c["bound_stated"], c["bound_covered"]) == (n, n, k)
    assert c["coverage"] == pytest.approx(k / n)
    low, high = c["coverage_interval"]
    assert low == pytest.approx(beta.ppf(0.025, k, n - k + 1), rel=1e-6)
    assert high == pytest.approx(beta.ppf(0.975, k + 1, n - k), rel=1e-6)
    assert c["calibration_shots_max_over_oracle"] == pytest.approx(150_000 / 72_000)


def test_confidence_targets_follow_the_issue_thresholds():
    """Issue 18's bars: no calibration above 4x the floor, the 95 % bound holding in at least
    90 % of stages, nothing accepted below 0.95 of the true best, every refusal said in one
    line; each checked on made-up figures on either side of its bar."""
    # Source: issue 18's targets.
    floor = 72_000.0
    good = [{"calibrate": _stage(0.99, 0.02, shots=288_000), "retune": _stage(0.99, 0.02)}
            for _ in range(10)]                                 # 4.0x: on the bar, met
    good[0]["calibrate"] = _stage(0.97, 0.02)                   # 1 of 20 not covered: 95 %
    good[1]["retune"] = _stage(0.99, 0.02, accepted=False, reason="not accepted: bound above")

    def statuses(records):
        c = {"main": {bench.GUIDED: bench_summaries.summarise_confidence(records, floor)}}
        return [t["status"] for t in bench_targets.confidence_targets(c, ["main"])]

    assert statuses(good) == ["met", "met", "met"]
    worse = [dict(r) for r in good]
    worse[2] = {"calibrate": _stage(0.99, 0.02, shots=288_001), "retune": _stage(0.96, 0.01)}
    worse[3] = {"calibrate": _stage(0.94, 0.05), "retune": _stage(0.99, 0.02)}   # accepted < 0.95
    # three of twenty bounds broken now (good[0], worse[2] and worse[3]): 85 % < 90 %
    assert statuses(worse) == ["MISSED", "MISSED", "MISSED"]
    silent = [dict(r) for r in good]
    silent[1] = {"calibrate": _stage(0.99, 0.02),
                 "retune": _stage(0.99, 0.02, accepted=False, reason="")}
    unstated = [dict(r) for r in good]
    unstated[4] = {"calibrate": _stage(0.99, None), "retune": _stage(0.99, 0.02)}
    assert statuses(silent)[2] == "MISSED" and statuses(unstated)[1] == "MISSED"


def test_a_retune_skipped_on_a_rig_below_min_inversion_is_not_a_miss():
    """A rig whose true best lies below [acceptance] min_inversion cannot be accepted, so its
    skipped retune is said as not applicable; a skip on any other rig stays a miss."""
    # Source: issue 18 ("accepted only when ... the verification passes min_inversion") and
    # issue 10's retune target (19 of 20 at 0.98), on made-up records.
    floor = 72_000.0
    ran = [{"calibrate": {**_stage(0.99, 0.02), "final_true_best": 0.7},
            "retune": {**_stage(0.99, 0.02), "ratio_after_step": 0.87,
                       "moved_judged_still_good": False, "status": "accepted",
                       "shots_to_threshold": 1, "rig_time_to_threshold_s": 1.0,
                       "reached": True, "points": 2, "verified_stderr": 0.02}}
           for _ in range(5)]
    dim = {"calibrate": {**_stage(0.99, 0.02, accepted=False), "final_true_best": 0.45},
           "retune": {"skipped": "calibration not accepted, no last good setting"}}
    near = {"calibrate": {**_stage(0.99, 0.02, accepted=False), "final_true_best": 0.51},
            "retune": {"skipped": "calibration not accepted, no last good setting"}}
    summary = {"main": {bench.GUIDED: bench_summaries.summarise(
        [r["calibrate"] | {"shots_to_threshold": 1, "rig_time_to_threshold_s": 1.0,
                           "reached": True, "points": 5, "status": "accepted",
                           "verified_stderr": 0.01} for r in ran], floor)}}

    def retune_verdict(records):
        retune = {"main": {bench.GUIDED: bench_summaries.summarise_retunes(records, floor, 0.5)}}
        rows = bench_targets.guided_targets(summary, retune, ["main"], run=True)
        return next(t for t in rows if "retune" in t["name"] and "final true ratio" in t["name"])

    verdict = retune_verdict(ran + [dim])
    assert verdict["status"] == "met" and "1 on rigs whose true best is below" in verdict["measured"]
    assert retune_verdict(ran + [dim, near])["status"] == "MISSED"


@_READS_STUDY
def test_the_study_keeps_the_confidence_of_every_stage_that_ran(study):
    """The study's confidence figures count exactly its calibrations and the retunes that ran."""
    # Source: the study's own runs, counted independently here.
    for family, rows in study["confidence"].items():
        for kind, c in rows.items():
            runs = [r for r in study["runs"] if r["family"] == family and r["strategy"] == kind]
            ran = sum(1 + ("retune" in r and "skipped" not in r["retune"]) for r in runs)
            assert c["stages"] == ran
            assert c["accepted"] + c["refused"] == ran
