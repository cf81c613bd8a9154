"""The middle zone of the night's checks (autotune.analysis.hold_plan: SOONER_LEVEL,
SOONER_INTERVAL, in_control_sooner, next_check): a check that leaves a phase chart between half
its warning level and the warning level brings the next check after half the interval (a CUSUM
with variable sampling intervals: M. R. Reynolds, R. W. Amin and J. C. Arnold, Technometrics 32,
371 (1990)). Checked against seeded charts on white noise (scipy.stats.norm): the share of
checks in the zone, the mean gap and beam share the planner counts, and the mean rig time
between false alarms it designs for."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hold_helpers import DEMO_SLOPE, demo_prior, hold_settings
from scipy import stats

from autotune.analysis.hold import (
    DriftLock,
    NoiseModel,
    SequentialTest,
    in_control_rechecks,
    in_control_sooner,
    next_check,
    plan_checks,
)
from autotune.analysis.hold_plan import SOONER_INTERVAL, SOONER_LEVEL

SLOPE = DEMO_SLOPE
_prior = demo_prior


def _plan():
    return plan_checks(hold_settings(), noise=NoiseModel(18000 * 0.10**2, 18000 * 0.03**2, 6),
                       prior=_prior(), lock=DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0),
                       reference_inversion=0.72, reference_stderr=0.02, check_share=0.025)


@pytest.mark.parametrize(("reference", "threshold", "warning"),
                         [(0.8, 4.0, 1.0), (0.7, 4.5, 1.57), (1.0, 3.3, 1.65)])
def test_the_share_of_checks_in_the_middle_zone_matches_seeded_charts(reference, threshold,
                                                                     warning):
    """The long-run share of in-control checks that leave a one-sided chart at or above
    SOONER_LEVEL of its warning level and below it (the Brook-Evans chain's stationary value)
    against 20,000 seeded charts of N(0, 1) data (scipy.stats.norm), an alarm restarting a chart
    at 0: within four binomial standard errors."""
    rng = np.random.default_rng(20261205)
    s = np.zeros(20000)
    for _ in range(300):
        s = np.maximum(0.0, s + stats.norm.rvs(size=s.size, random_state=rng) - reference)
        s[s > threshold] = 0.0
    share = float(np.mean((s >= SOONER_LEVEL * warning) & (s < warning)))
    se = math.sqrt(share * (1.0 - share) / s.size)
    assert abs(share - in_control_sooner(reference, threshold, warning)) < 4.0 * se + 0.005
    assert in_control_sooner(reference, threshold, warning) == pytest.approx(
        in_control_rechecks(reference, threshold, SOONER_LEVEL * warning)
        - in_control_rechecks(reference, threshold, warning))


def test_the_next_check_comes_sooner_only_from_the_middle_zone():
    """Below SOONER_LEVEL of the warning level: the plan's interval after the last check's first
    shot; at or above it (a check held or corrected): SOONER_INTERVAL of it; a recheck stays at
    once; an alarm's statistic never shortens a recheck run's end."""
    plan = _plan()
    level = SOONER_LEVEL * plan.test.warning
    below = next_check(plan, action="hold", clock_s=1000.0, first_shot_s=990.0, run=0,
                       statistic=0.99 * level)
    assert not below["sooner"] and below["due_clock"] == pytest.approx(990.0 + plan.interval_s)
    for action in ("hold", "correct"):
        zone = next_check(plan, action=action, clock_s=1000.0, first_shot_s=990.0, run=0,
                          statistic=level)
        assert zone["sooner"] and not zone["recheck"]
        assert zone["due_clock"] == pytest.approx(990.0 + SOONER_INTERVAL * plan.interval_s)
    again = next_check(plan, action="recheck", clock_s=1000.0, first_shot_s=990.0, run=0,
                       statistic=2.0 * plan.test.warning)
    assert again["recheck"] and again["due_clock"] == 1000.0 and not again["sooner"]
    # Without the statistic (older callers) nothing changes.
    plain = next_check(plan, action="correct", clock_s=1000.0, first_shot_s=990.0, run=0)
    assert not plain["sooner"] and plain["due_clock"] == pytest.approx(990.0 + plan.interval_s)


def _quiet_night(plan, checks: int, rng: np.random.Generator) -> tuple[float, int, float]:
    """A quiet night of the plan's checks run by next_check on white noise: the phase charts'
    standardised innovations and the inversion's standardised drop N(0, 1) (seeded,
    scipy.stats.norm), an alarm restarting the charts at 0. Returns the rig time, the alarms and
    the beam time of the checks."""
    t: SequentialTest = plan.test
    z = stats.norm.rvs(size=(checks, 2), random_state=rng)
    upper = lower = inversion = 0.0
    clock = beam = 0.0
    alarms = run = 0
    for phase_z, drop_z in z:
        first = clock
        clock += plan.check_s
        beam += plan.check_s
        upper, lower = SequentialTest.step(upper, lower, float(phase_z), t.reference)
        inversion = max(0.0, inversion + float(drop_z) - t.inversion_reference)
        if max(upper, lower) > t.threshold or inversion > t.inversion_threshold:
            alarms += 1
            upper = lower = inversion = 0.0
            action = "hold"
        elif max(upper, lower) > t.warning or inversion > t.inversion_warning:
            action = "recheck"
        else:
            action = "hold"
        after = next_check(plan, action=action, clock_s=clock, first_shot_s=first, run=run,
                           statistic=max(upper, lower))
        run = after["run"]
        clock = after["due_clock"]
    return clock, alarms, beam


def test_a_quiet_night_keeps_the_planned_beam_and_false_alarm_rate():
    """Seeded quiet nights of the plan's checks with the middle zone (250,000 checks): the mean
    gap between checks is at least the planner's (within 3 %) and at most 8 % longer (the
    planner counts a check that is both a recheck of the inversion chart and in a phase chart's
    middle zone twice, so it errs to shorter gaps, more beam planned than spent), so the checks'
    beam stays within the share the budget gave them; and the mean rig time between false alarms
    of the three charts is the planner's Siegmund design (within 25 %: Siegmund's approximation
    and the Poisson spread of about 300 alarms; 85.2 h measured against 84.7 h planned)."""
    plan = _plan()
    rng = np.random.default_rng(5)
    checks = 250_000
    clock, alarms, beam = _quiet_night(plan, checks, rng)
    gap = clock / checks
    assert 0.97 * plan.inputs["mean_gap_s"] <= gap <= 1.08 * plan.inputs["mean_gap_s"]
    assert beam / clock <= plan.check_share * 1.03
    assert plan.inputs["sooner_share"] > 0.0
    assert alarms > 50
    assert clock / alarms / 3600.0 == pytest.approx(plan.false_alarm_interval_h, rel=0.25)
