"""The checks' time to confirm a shift with the middle zone (autotune.analysis.hold_plan:
vsi_delay, the planner's choice of the middle zone's wait): the adjusted average time to signal
of a CUSUM with variable sampling intervals from its Markov chain (M. R. Reynolds, R. W. Amin
and J. C. Arnold, Technometrics 32, 371 (1990); D. Brook and D. A. Evans, Biometrika 59, 539
(1972)), checked against seeded charts (scipy.stats.norm) run by the same rule."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hold_helpers import demo_prior, hold_settings
from scipy import stats

from autotune.analysis.hold import DriftLock, NoiseModel, plan_checks
from autotune.analysis.hold_plan import (
    SOONER_INTERVALS,
    SOONER_LEVEL,
    step_delay_of,
    vsi_delay,
)


def _seeded_delays(shift: float, reference: float, threshold: float, warning: float,
                   interval: float, check_s: float, sooner: float, charts: int,
                   rng: np.random.Generator) -> np.ndarray:
    """Rig time from a shift to the alarm of ``charts`` seeded one-sided charts: each first runs
    400 in-control checks (N(0, 1), an alarm restarting it at 0: its stationary state), the shift
    comes half an interval before the next check, then checks of N(shift, 1) come at once above
    ``warning``, after ``sooner`` of the interval at or above SOONER_LEVEL of it, else after the
    interval; the alarm's own check counts ``check_s``."""
    s = np.zeros(charts)
    for _ in range(400):
        s = np.maximum(0.0, s + stats.norm.rvs(size=charts, random_state=rng) - reference)
        s[s > threshold] = 0.0
    time = np.full(charts, 0.5 * interval)
    alive = np.ones(charts, dtype=bool)
    for _ in range(100_000):
        if not alive.any():
            break
        n = int(alive.sum())
        s[alive] = np.maximum(0.0, s[alive] + stats.norm.rvs(loc=shift, size=n, random_state=rng)
                              - reference)
        alarmed = alive & (s > threshold)
        time[alarmed] += check_s
        alive &= ~alarmed
        wait = np.where(s >= warning, check_s,
                        np.where(s >= SOONER_LEVEL * warning, sooner * interval, interval))
        time[alive] += wait[alive]
    assert not alive.any()
    return time


@pytest.mark.parametrize(("shift", "reference", "threshold", "warning", "sooner"), [
    (2.0, 0.7, 4.4, 2.2, 0.5),     # a 15 kHz step at the demo's cadence, the middle zone at half
    (2.0, 0.7, 4.4, 2.2, 0.125),   # the same, the middle zone at an eighth
    (1.2, 0.6, 5.0, 2.5, 0.25),    # a smaller shift: several checks in the middle zone
    (3.5, 0.7, 4.4, 1.5, 0.5),     # a large shift: flagged by the first check mostly
])
def test_the_chains_time_to_confirm_matches_seeded_charts(shift, reference, threshold, warning,
                                                          sooner):
    """vsi_delay against 20,000 seeded charts per case (a 400 s interval, 9 s checks): within
    four standard errors of the seeded mean and 3 % (the chain's 40 cells: Brook and Evans'
    discretisation, which the in-control tests of the middle zone hold to 0.5 % of share)."""
    rng = np.random.default_rng(20261205)
    delays = _seeded_delays(shift, reference, threshold, warning, 400.0, 9.0, sooner, 20_000,
                            rng)
    mean, se = float(delays.mean()), float(delays.std(ddof=1) / math.sqrt(delays.size))
    planned = vsi_delay(shift, reference, threshold, warning, 400.0, 9.0, sooner_interval=sooner)
    assert abs(planned - mean) < 4.0 * se + 0.03 * mean


def test_a_shorter_middle_zone_wait_confirms_sooner_and_late_steps_wait_longer():
    """The same chart, the middle zone's wait shorter: a step is confirmed no later (each check
    in the middle zone comes sooner); a step just after a check waits half an interval more than
    one at the middle of it (the first check's wait, nothing else changes); a shift no larger
    than the reference never alarms (the chain's drift is not upward: inf)."""
    args = (2.0, 0.7, 4.4, 2.2, 400.0, 9.0)
    delays = [vsi_delay(*args, sooner_interval=d) for d in sorted(SOONER_INTERVALS)]
    assert delays == sorted(delays)
    assert vsi_delay(*args, late=True) - vsi_delay(*args) == pytest.approx(200.0)
    assert vsi_delay(0.7, 0.7, 4.4, 2.2, 400.0, 9.0) == math.inf


def test_the_planner_states_its_middle_zone_and_the_delay_it_was_chosen_on():
    """The plan records the middle zone's wait it chose (one of SOONER_INTERVALS); its planned
    time to confirm the step is the chain's at that wait (step_delay_of), and no longer than the
    same cadence with the middle zone at half the interval."""
    plan = plan_checks(hold_settings(), noise=NoiseModel(18000 * 0.10**2, 18000 * 0.03**2, 6),
                       prior=demo_prior(), lock=DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0),
                       reference_inversion=0.72, reference_stderr=0.02, check_share=0.025)
    sooner = plan.inputs["sooner_interval"]
    assert sooner in SOONER_INTERVALS
    assert step_delay_of(plan, 15e3) == pytest.approx(plan.step_delay_s)
    t = plan.test
    shift_sd = 15e3 / plan.inputs["innovation_sd_hz"]
    assert plan.step_delay_s <= vsi_delay(shift_sd, t.reference, t.threshold, t.warning,
                                          plan.interval_s, plan.check_s,
                                          sooner_interval=0.5) + 1e-9
    assert f"after {sooner:.0%} of the interval" in plan.reason
