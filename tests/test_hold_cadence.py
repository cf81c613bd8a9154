"""The cadence of the night's checks (autotune.analysis.hold): the Brook-Evans chain the planner uses,
against the published CUSUM run lengths and seeded normal data (scipy.stats.norm); the time to
confirm a thermal step and the share of rechecks, against seeded nights of checks; the pure
planning entry point the shell calls."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hold_helpers import DEMO_SLOPE, demo_prior, hold_settings
from scipy import stats

from autotune.analysis.hold import (
    BeamBudget,
    DriftLock,
    NoiseModel,
    cusum_chain,
    expected_stage_beam_s,
    flag_probability,
    in_control_rechecks,
    next_check,
    noise_row,
    plan_checks,
    plan_night,
    recheck_run_limit,
)

SLOPE = DEMO_SLOPE
_prior = demo_prior


def _stationary_draws(reference: float, threshold: float, chains: int, steps: int,
                      rng: np.random.Generator) -> np.ndarray:
    """The one-sided statistic of ``chains`` in-control charts after ``steps`` checks, an alarm
    restarting a chart at 0 (seeded N(0, 1) data, scipy.stats.norm)."""
    s = np.zeros(chains)
    for _ in range(steps):
        s = np.maximum(0.0, s + stats.norm.rvs(size=chains, random_state=rng) - reference)
        s[s > threshold] = 0.0
    return s


def test_the_planners_chain_reproduces_the_published_run_lengths():
    """Run lengths from the planner's chain (hold_plan.cusum_chain, solved for the mean time to the
    alarm from 0) against the one-sided CUSUM table with k = 0.5 in D. C. Montgomery,
    Introduction to Statistical Quality Control (from memory): within 1 % at 300 cells, and
    within 3 % at the 40 cells the planner uses."""
    table = {(4, 0.0): 336, (4, 0.5): 26.6, (4, 1.0): 8.38, (4, 2.0): 3.34,
             (5, 0.0): 930, (5, 0.5): 38.0, (5, 1.0): 10.4, (5, 2.0): 4.01}
    for (h, shift), published in table.items():
        for cells, tolerance in ((300, 0.01), (40, 0.03)):
            _, moves = cusum_chain(shift, 0.5, h, cells)
            arl = np.linalg.solve(np.eye(cells) - moves, np.ones(cells))[0]
            assert arl == pytest.approx(published, rel=tolerance), (h, shift, cells)


@pytest.mark.parametrize(("reference", "threshold", "warning"),
                         [(0.8, 4.0, 1.0), (0.6, 5.0, 0.75), (1.0, 3.3, 1.65)])
def test_the_share_of_rechecks_in_a_quiet_night_matches_seeded_data(reference, threshold,
                                                                    warning):
    """The long-run share of in-control checks that leave a chart at or above its warning level
    (each one followed by a recheck) is the chain's stationary value: seeded charts
    (scipy.stats.norm), within four standard errors of a binomial share."""
    rng = np.random.default_rng(20261204)
    s = _stationary_draws(reference, threshold, 20000, 300, rng)
    share = float(np.mean(s >= warning))
    se = math.sqrt(share * (1.0 - share) / s.size)
    assert abs(share - in_control_rechecks(reference, threshold, warning)) < 4.0 * se + 0.005


@pytest.mark.parametrize("shift", [1.5, 2.5, 3.5])
def test_the_first_check_after_a_step_flags_it_as_the_chain_says(shift):
    """The probability that the first check after a shift of ``shift`` standard deviations
    leaves the chart at or above its warning level, from its in-control state: the chain's
    value against seeded charts (scipy.stats.norm), within four binomial standard errors."""
    reference, threshold, warning = 0.8, 4.0, 1.0
    rng = np.random.default_rng(7)
    s = _stationary_draws(reference, threshold, 20000, 300, rng)
    after = np.maximum(0.0, s + stats.norm.rvs(loc=shift, size=s.size, random_state=rng)
                       - reference)
    share = float(np.mean(after >= warning))
    se = math.sqrt(share * (1.0 - share) / s.size)
    expected = flag_probability(shift, reference, threshold, warning)
    assert abs(share - expected) < 4.0 * se + 0.005, (share, expected)


def _planned():
    settings = hold_settings()
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0)
    noise = NoiseModel(18000 * 0.10**2, 18000 * 0.03**2, 6)
    return plan_checks(settings, noise=noise, prior=_prior(), lock=lock,
                       reference_inversion=0.72, reference_stderr=0.02, check_share=0.025)


def test_the_planned_time_to_confirm_a_step_matches_seeded_nights_of_checks():
    """A 15 kHz step at a uniform time of a quiet night of the plan's checks (every interval,
    and back to back while a statistic is at or above the warning level), the check's
    standardised innovations N(0, 1) before the step and N(step / sd, 1) after it (seeded,
    scipy.stats.norm; the lock's own following of the step is left out, as in the plan): the
    mean time from the step to the alarm is the plan's stated one within 20 %."""
    plan = _planned()
    t = plan.test
    k, h, w = t.reference, t.threshold, t.warning
    shift = 15e3 / plan.inputs["innovation_sd_hz"]
    rng = np.random.default_rng(11)
    trials = 4000
    s = _stationary_draws(k, h, trials, 300, rng)
    # The step lands within an interval; the next check comes after the rest of it.
    clock = rng.uniform(0.0, plan.interval_s, size=trials)
    delay = np.full(trials, np.nan)
    alive = np.ones(trials, dtype=bool)
    for _ in range(400):
        s[alive] = np.maximum(0.0, s[alive] + stats.norm.rvs(
            loc=shift, size=int(alive.sum()), random_state=rng) - k)
        hit = alive & (s > h)
        delay[hit] = clock[hit]
        alive &= ~hit
        if not alive.any():
            break
        clock[alive] += np.where(s[alive] >= w, plan.check_s, plan.interval_s)
    assert not alive.any()
    assert float(delay.mean()) == pytest.approx(plan.step_delay_s, rel=0.20)
    assert plan.inputs["step_delay_late_s"] >= plan.step_delay_s


def test_the_night_plans_from_its_rows_within_the_budget_or_not_at_all():
    """plan_night (what the shell calls): a plan whose checks take at most the share the budget
    gives them, rechecks included; no plan when nothing is left of the ceiling."""
    settings = hold_settings()
    estimate = {"phase_shift_stderr": 0.10 * math.sqrt(18000 / 2000), "inversion_stderr": 0.09,
                "detected_empty": 200, "detected_one_photon": 200, "contrast_empty": 0.8,
                "contrast_one_photon": 0.7, "chi2_empty": 3.0, "chi2_one_photon": 3.0,
                "dof_empty": 3, "dof_one_photon": 3}
    rows = [noise_row(estimate, 2000)] * 3
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0)
    reference = {"weight": 1.0 / 0.02**2, "weighted": 0.72 / 0.02**2}
    budget = BeamBudget.of(settings, elapsed_s=600.0, remaining_s=8 * 3600.0, spent_s=120.0)
    plan, share = plan_night(settings, budget=budget, rows=rows, prior=_prior(), lock=lock,
                             reference=reference, recovery_beam_s=240.0, recoveries=0)
    assert plan is not None and 0.0 < share["share"] <= 0.5 * settings.budget_fraction
    assert plan.check_share <= share["share"] + 1e-9
    spent = BeamBudget.of(settings, elapsed_s=600.0, remaining_s=8 * 3600.0,
                          spent_s=budget.ceiling_s)
    nothing, share = plan_night(settings, budget=spent, rows=rows, prior=_prior(), lock=lock,
                                reference=reference, recovery_beam_s=240.0, recoveries=0)
    assert nothing is None and share["share"] == 0.0


def test_a_recovery_is_expected_to_cost_the_mean_with_the_prior_as_one_more():
    """The reserve for recoveries does not shrink to a night's cheapest stage: the prior counts
    as one of them."""
    assert expected_stage_beam_s(360.0, []) == pytest.approx(360.0)
    assert expected_stage_beam_s(360.0, [120.0]) == pytest.approx(240.0)
    assert expected_stage_beam_s(360.0, [240.0, 240.0]) == pytest.approx(280.0)


def test_rechecks_at_once_stop_after_the_run_that_confirms_the_design_shift():
    """The rechecks in a row come at once up to the run length that confirms the design shift
    (``2 k`` sd), then at the plan's interval; a seeded chart at the design shift (scipy.stats
    norm) alarms within that many checks in the median, so the limit cuts no step the plan is
    designed for short, and a check that is not a recheck starts the count again."""
    rng = np.random.default_rng(11)
    plan = plan_checks(hold_settings(), noise=NoiseModel(60.0, 2.0, 8), prior=_prior(),
                       lock=DriftLock.start(0.0, 0.0, 500.0, 0.0, 0.3, 20.0),
                       reference_inversion=0.7, reference_stderr=0.01, check_share=0.025)
    k, h = plan.test.reference, plan.test.threshold
    limit = recheck_run_limit(plan.test)
    lengths = []
    for _ in range(2000):
        s, n = 0.0, 0
        while s <= h:
            s = max(0.0, s + stats.norm.rvs(loc=2.0 * k, random_state=rng) - k)
            n += 1
        lengths.append(n)
    assert np.median(lengths) <= limit
    run = 0
    for _ in range(limit):
        after = next_check(plan, action="recheck", clock_s=1000.0, first_shot_s=990.0, run=run)
        assert after["recheck"] and after["due_clock"] == 1000.0
        run = after["run"]
    after = next_check(plan, action="recheck", clock_s=1000.0, first_shot_s=990.0, run=run)
    assert not after["recheck"] and after["due_clock"] == pytest.approx(990.0 + plan.interval_s)
    after = next_check(plan, action="correct", clock_s=1000.0, first_shot_s=990.0, run=run)
    assert after["run"] == 0 and after["due_clock"] == pytest.approx(990.0 + plan.interval_s)
