"""The first check after a start or a retune (autotune.analysis.hold_plan: innovation_sd_at,
reach_s, next_check's ``lock``): the plan sizes its test on the drift filter's settled state,
and the lock's prediction over a whole interval after a start carries the rate's uncertainty
times the interval squared. The innovation a check reads is checked against the Kalman
filter's prediction stage written out here (Y. Bar-Shalom, X. R. Li and T. Kirubarajan,
"Estimation with Applications to Tracking and Navigation", Wiley 2001: sec. 5.2.3,
``P(k+1|k) = F P F' + Q`` and ``S = H P H' + R``; sec. 6.2.2, the process noise of a
continuous white-noise acceleration, here the rate's random walk) and against a seeded
simulation of the continuous model (numpy)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hold_helpers import demo_prior, hold_settings

from autotune.analysis.hold import (
    DriftLock,
    NoiseModel,
    innovation_sd_at,
    next_check,
    plan_checks,
    reach_s,
)
from autotune.analysis.hold_lock import RATE_WALK_HZ_PER_S_PER_SQRT_S
from autotune.analysis.hold_plan import LEAST_REACH, REACH_RATIO

# A faint-signal rig's start: the calibration left the rate at 3.0 +- 1.05 Hz/s (as the
# zones_set_once development night of benchmarks/README.md, session 11) and the peak at 300 Hz.
_START = DriftLock.start(0.0, 0.0, 300.0, 3.0, 1.05, 20.0)


def _plan(lock: DriftLock = _START):
    # Rare checks: a share of 0.25 % of the beam, checks up to an hour apart.
    return plan_checks(hold_settings(max_interval_s=3600.0),
                       noise=NoiseModel(18000 * 0.02**2, 18000 * 0.03**2, 6), prior=demo_prior(),
                       lock=lock, reference_inversion=0.72, reference_stderr=0.02,
                       check_share=0.0025)


def _textbook_sd(lock: DriftLock, tau: float, r: float) -> float:
    """S = H (F P F' + Q) H' + R for the state (peak, rate), F = [[1, tau], [0, 1]],
    Q = q tau [[1, 0], [0, 0]] + qr [[tau^3/3, tau^2/2], [tau^2/2, tau]] (Bar-Shalom et al.)."""
    f = np.array([[1.0, tau], [0.0, 1.0]])
    q = lock.walk_hz_per_sqrt_s**2
    qr = RATE_WALK_HZ_PER_S_PER_SQRT_S**2
    big_q = q * tau * np.array([[1.0, 0.0], [0.0, 0.0]]) + \
        qr * np.array([[tau**3 / 3.0, tau**2 / 2.0], [tau**2 / 2.0, tau]])
    p = f @ np.array(lock.covariance) @ f.T + big_q
    h = np.array([1.0, 0.0])
    return math.sqrt(float(h @ p @ h) + r)


@pytest.mark.parametrize("tau", [60.0, 600.0, 2940.0])
def test_the_predicted_innovation_is_the_kalman_filters(tau):
    """innovation_sd_at equals the textbook prediction stage (to 1e-9), and a seeded
    simulation of the continuous model (the peak's and the rate's random walks in 200 steps,
    start drawn from the lock's covariance, the check's Gaussian error) gives the same spread
    within 4 standard errors of a sample deviation (sd / sqrt(2 n))."""
    r = 1200.0**2
    assert innovation_sd_at(_START, tau, r) == pytest.approx(_textbook_sd(_START, tau, r),
                                                             rel=1e-9)
    rng = np.random.default_rng(20261205)
    n, steps = 40_000, 200
    dt = tau / steps
    peak = rng.normal(0.0, _START.peak_stderr_hz, n)
    rate = rng.normal(_START.rate_hz_per_s, _START.rate_stderr_hz_per_s, n)
    for _ in range(steps):
        # Exact over each step for the rate's walk integrated into the peak: peak first with the
        # rate at the step's start plus the integrated part of the rate's increment.
        d_rate = rng.normal(0.0, RATE_WALK_HZ_PER_S_PER_SQRT_S * math.sqrt(dt), n)
        extra = rng.normal(0.0, RATE_WALK_HZ_PER_S_PER_SQRT_S * math.sqrt(dt**3 / 12.0), n)
        peak = peak + rate * dt + 0.5 * d_rate * dt + extra \
            + rng.normal(0.0, _START.walk_hz_per_sqrt_s * math.sqrt(dt), n)
        rate = rate + d_rate
    reading = peak + rng.normal(0.0, math.sqrt(r), n)
    innovation = reading - _START.peak_at(tau)
    sd = innovation_sd_at(_START, tau, r)
    assert abs(float(np.std(innovation)) - sd) < 4.0 * sd / math.sqrt(2.0 * n)
    assert abs(float(np.mean(innovation))) < 4.0 * sd / math.sqrt(n)


def test_the_first_check_after_a_start_reads_a_step_as_designed():
    """The gap: after a start the lock's prediction over the plan's whole interval is wider
    than the settled innovation the plan designed its test on (the rate's uncertainty over the
    interval), so a step reads at fewer standard deviations than planned. next_check with the
    lock brings the check forward to a time where the textbook prediction is within
    REACH_RATIO of the plan's, and the step reads at least at 1 / REACH_RATIO of the planned
    z."""
    plan = _plan()
    planned = plan.inputs["innovation_sd_hz"]
    r = plan.detuning_stderr_hz**2
    at_interval = _textbook_sd(_START, plan.interval_s, r)
    assert at_interval > 1.5 * planned  # the gap the plan did not see
    step = 15e3
    assert step / at_interval < plan.inputs["step_z"]
    after = next_check(plan, action="hold", clock_s=0.0, first_shot_s=0.0, run=0, statistic=0.0,
                       lock=_START)
    wait = after["due_clock"]
    assert after["reach"] and not after["sooner"] and not after["recheck"]
    assert LEAST_REACH * plan.interval_s <= wait < plan.interval_s
    assert _textbook_sd(_START, wait, r) <= planned * REACH_RATIO
    assert step / _textbook_sd(_START, wait, r) >= plan.inputs["step_z"] / REACH_RATIO
    # The last such time on the search's grid: one grid step later is beyond the plan's.
    grid = (plan.interval_s - LEAST_REACH * plan.interval_s) / 63.0
    assert _textbook_sd(_START, wait + grid, r) > planned * REACH_RATIO
    # Without the lock (older callers) the interval is the plan's.
    plain = next_check(plan, action="hold", clock_s=0.0, first_shot_s=0.0, run=0)
    assert plain["due_clock"] == pytest.approx(plan.interval_s) and not plain["reach"]


def test_a_settled_lock_keeps_the_plans_interval():
    """The plan's settled innovation is the filter's own steady state: a lock run through 60
    checks at the plan's interval (DriftLock.update, the plan's measurement variance, the gain
    bounded as the night bounds it) predicts the plan's innovation at the next one (to 1 %),
    and reach_s leaves the interval as planned (within one grid step)."""
    plan = _plan()
    settings = hold_settings(max_interval_s=3600.0)
    r = plan.detuning_stderr_hz**2
    lock, clock = _START, 0.0
    for _ in range(60):
        clock += plan.interval_s
        lock, _ = lock.update(clock, lock.peak_at(clock), r, max_gain=settings.max_gain)
    assert innovation_sd_at(lock, clock + plan.interval_s, r) == pytest.approx(
        plan.inputs["innovation_sd_hz"], rel=0.01)
    wait = reach_s(plan, lock, start_s=clock, wait_s=plan.interval_s)
    assert wait >= plan.interval_s * (1.0 - (1.0 - LEAST_REACH) / 63.0) - 1e-6


def test_a_lock_already_wider_than_the_plan_waits_the_least_share():
    """A lock whose peak alone is less certain than the plan's innovation (a poor stage's end)
    is checked after LEAST_REACH of the interval, not back to back."""
    plan = _plan()
    wide = DriftLock.start(0.0, 0.0, 2.0 * REACH_RATIO * plan.inputs["innovation_sd_hz"], 3.0,
                           1.05, 20.0)
    wait = reach_s(plan, wide, start_s=100.0, wait_s=plan.interval_s)
    assert wait == pytest.approx(LEAST_REACH * plan.interval_s)
    # Never later than the wait asked for (a middle-zone check's half interval).
    half = 0.5 * plan.interval_s
    assert reach_s(plan, _START, start_s=0.0, wait_s=half) <= half
