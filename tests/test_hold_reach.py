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
    BeamBudget,
    DriftLock,
    NoiseModel,
    early_checks,
    innovation_sd_at,
    noise_row,
    plan_night,
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


def _textbook_early(plan, lock: DriftLock, max_gain: float, horizon_s: float):
    """The checks brought forward, counted on the Kalman covariance recursion written out with
    numpy matrices (Bar-Shalom et al. 2001, sec. 5.2.3: P(k+1|k) = F P F' + Q, S = H P H' + R,
    W = P H' / S, the gain's peak component bounded and both scaled alike; the update in Joseph
    form, P = (I - W H) P (I - W H)' + W R W'), the wait on the 64-point grid of the reach rule
    (the last time S stays within REACH_RATIO of the plan's, never below LEAST_REACH of the
    interval). The covariance recursion needs no readings."""
    q = lock.walk_hz_per_sqrt_s**2
    qr = RATE_WALK_HZ_PER_S_PER_SQRT_S**2
    r = plan.detuning_stderr_hz**2
    limit = REACH_RATIO * plan.inputs["innovation_sd_hz"]
    h = np.array([[1.0, 0.0]])
    p = np.array(lock.covariance, dtype=float)
    interval = plan.interval_s

    def predicted(tau):
        f = np.array([[1.0, tau], [0.0, 1.0]])
        big_q = q * tau * np.array([[1.0, 0.0], [0.0, 0.0]]) + \
            qr * np.array([[tau**3 / 3.0, tau**2 / 2.0], [tau**2 / 2.0, tau]])
        return f @ p @ f.T + big_q

    span, checks = 0.0, 0
    while span < horizon_s:
        if math.sqrt(predicted(interval)[0, 0] + r) <= limit:
            break
        least = LEAST_REACH * interval
        wait = least
        for tau in np.linspace(least, interval, 64):
            if math.sqrt(predicted(tau)[0, 0] + r) > limit:
                break
            wait = tau
        prior = predicted(wait)
        s = float((h @ prior @ h.T)[0, 0]) + r
        gain = (prior @ h.T / s).ravel()
        if gain[0] > max_gain:
            gain = gain * (max_gain / gain[0])
        k = gain.reshape(2, 1)
        a = np.eye(2) - k @ h
        p = a @ prior @ a.T + r * (k @ k.T)
        span += wait
        checks += 1
    return checks, span


@pytest.mark.parametrize("rate_sd", [0.3, 1.05, 2.0])
def test_the_early_checks_are_counted_on_the_textbook_recursion(rate_sd):
    """early_checks (what plan_night counts) brings the same checks forward over the same rig
    time as the textbook recursion above, for rate uncertainties after a start of 0.3-2 Hz/s;
    the extra beam is their beam less the plan's share of that time. A lock already at the
    plan's settled state (60 checks at its interval) brings none forward."""
    start = DriftLock.start(0.0, 0.0, 300.0, 3.0, rate_sd, 20.0)
    plan = _plan(start)
    early = early_checks(plan, start, max_gain=1.0, horizon_s=8 * 3600.0)
    checks, span = _textbook_early(plan, start, 1.0, 8 * 3600.0)
    assert early["checks"] == checks
    assert early["span_s"] == pytest.approx(span, rel=1e-9)
    assert early["extra_beam_s"] == pytest.approx(
        max(checks * plan.check_s - span * plan.check_share, 0.0), rel=1e-9)
    if rate_sd >= 1.05:
        assert checks >= 1
    settled = start
    for i in range(1, 61):
        t = i * plan.interval_s
        settled, _ = settled.update(t, settled.peak_at(t), plan.detuning_stderr_hz**2)
    assert early_checks(plan, settled, max_gain=1.0, horizon_s=3600.0)["checks"] == 0


def test_the_night_plans_its_cadence_with_the_early_checks_counted():
    """plan_night after a start whose rate is uncertain (5 and 8 Hz/s; 85 % of the ceiling spent,
    so the checks' share is what is left of it and the cadence is rare): the cadence's beam over the
    plan's hour and the early checks' extra beam together stay within the share the budget gives
    the checks (the ceiling logic of hold_budget.checks_share), and the share the cadence was
    planned on is lower than the budget's. At 3 Hz/s the plan's cadence brings none forward and
    the share is the budget's."""
    settings = hold_settings(max_interval_s=3600.0)
    estimate = {"phase_shift_stderr": 0.10 * math.sqrt(18000 / 2000), "inversion_stderr": 0.09,
                "detected_empty": 200, "detected_one_photon": 200, "contrast_empty": 0.8,
                "contrast_one_photon": 0.7, "chi2_empty": 3.0, "chi2_one_photon": 3.0,
                "dof_empty": 3, "dof_one_photon": 3}
    rows = [noise_row(estimate, 2000)] * 3
    reference = {"weight": 1.0 / 0.02**2, "weighted": 0.72 / 0.02**2}
    budget = BeamBudget.of(settings, elapsed_s=600.0, remaining_s=8 * 3600.0,
                           spent_s=0.85 * 0.05 * (8 * 3600.0 + 600.0))
    for rate_sd, expect_early in ((5.0, True), (8.0, True), (3.0, False)):
        lock = DriftLock.start(0.0, 0.0, 300.0, 3.0, rate_sd, 20.0)
        plan, share = plan_night(settings, budget=budget, rows=rows, prior=demo_prior(),
                                 lock=lock, reference=reference, recovery_beam_s=240.0,
                                 recoveries=0)
        assert plan is not None
        window = max(min(3600.0, budget.ahead_s), share["early_span_s"], 60.0)
        assert plan.check_share * window + share["early_extra_beam_s"] <= \
            share["share"] * window * (1.0 + 1e-6)
        if expect_early:
            assert share["early_checks"] >= 1
            assert share["planned_share"] < share["share"]
        else:
            assert share["early_checks"] == 0
            assert share["planned_share"] == share["share"]
