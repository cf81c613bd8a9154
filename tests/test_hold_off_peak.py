"""A check that says the set-point is off the peak brings the next check at once
(autotune.analysis.hold_check.off_peak, OFF_PEAK_Z; hold_plan.next_check's ``off_peak``).

A poor source's first check after a thermal step read its set-point -13.3 kHz from the peak,
+-2.6 kHz by its own noise, while the lock's uncertainty over an hour's interval left the
innovation at z 1.2: no alarm, and the walk back, max_correction_hz (5 kHz) a check, waited an
interval per check (benchmarks/README.md, session 8). Checked here: the level is a two-sided
z test at 0.1 % (scipy.stats.norm); seeded quiet checks read off the peak at that rate; seeded
quiet nights keep the planner's false-alarm interval (at most one false retune per 8 h, the
issue's target); such a step's walk back is done at once, in minutes, with no alarm."""

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
    assess_check,
    next_check,
    plan_checks,
)
from autotune.analysis.hold_check import OFF_PEAK_Z
from autotune.analysis.hold_plan import CheckPlan, recheck_run_limit
from autotune.analysis.search_types import PointResult


def _check(phase_shift: float, phase_sd: float, clock: float) -> PointResult:
    return PointResult(inversion=0.72, inversion_stderr=0.06, phase_shift=phase_shift,
                       phase_shift_stderr=phase_sd, absorption=0.015, absorption_stderr=0.004,
                       contrast_empty=0.45, contrast_empty_stderr=0.03,
                       contrast_one_photon=0.405, contrast_one_photon_stderr=0.03,
                       identified=True, clock_s=clock, shots=3600)


def _test_plan(interval_s: float = 3450.0) -> CheckPlan:
    test = SequentialTest(1.0, 3.5, 1.75, 0.4, 6.0, 3.0)
    return CheckPlan(interval_s=interval_s, shots_per_phase=300, check_s=24.0,
                     check_share=24.0 / interval_s, detuning_stderr_hz=3000.0,
                     design_shift_hz=5400.0, test=test, expected_delay_s=600.0,
                     step_delay_s=400.0, false_alarm_interval_h=80.0, tracking_error_hz=800.0,
                     reason="test", inputs={})


def test_the_off_peak_level_is_a_two_sided_tenth_of_a_percent():
    """OFF_PEAK_Z is scipy.stats.norm's two-sided 0.1 % point."""
    assert OFF_PEAK_Z == pytest.approx(stats.norm.isf(0.0005), rel=1e-12)


def test_quiet_checks_read_off_the_peak_at_the_tests_rate():
    """20,000 seeded checks with the set-point on the peak (phase noise N(0, sd^2) on a linear
    curve, each assessed by the same settled lock): the share read off the peak is the z test's
    two-sided 0.1 % (scipy.stats.binomtest, p above 0.001), and none is a capped correction."""
    settings, prior, plan = hold_settings(), demo_prior(), _test_plan(600.0)
    lock = DriftLock.start(0.0, 0.0, 300.0, 0.0, 0.05, 20.0)
    phase_sd = 1000.0 * DEMO_SLOPE  # a 1 kHz reading
    rng = np.random.default_rng(20261205)
    n = 20_000
    flagged = 0
    for noise in rng.standard_normal(n):
        a = assess_check(settings, result=_check(math.pi + phase_sd * noise, phase_sd, 600.0),
                         detuning_hz=0.0, lock=lock, prior=prior, plan=plan, upper=0.0,
                         lower=0.0, inversion=0.0, reference_inversion=0.72,
                         reference_stderr=0.02, next_interval_s=600.0)
        assert a.reading_z == pytest.approx(noise, abs=1e-9)
        assert abs(a.target_detuning_hz) < settings.max_correction_hz
        flagged += a.off_peak
    assert stats.binomtest(flagged, n, 2.0 * stats.norm.sf(OFF_PEAK_Z)).pvalue > 1e-3


@pytest.mark.parametrize("rho", [0.0, 0.9])
def test_a_quiet_night_keeps_its_false_alarm_interval_with_off_peak_checks(rho):
    """Seeded quiet nights (250,000 checks) of a planned night run by next_check, each check's
    reading z correlated ``rho`` with its innovation's z (both N(0, 1), scipy.stats.norm), a
    reading at or beyond OFF_PEAK_Z bringing the next check at once: the mean rig time between
    false alarms of the three charts stays within 25 % of the planner's design and above 8 h
    (the issue's one false retune per 8 h), and the checks' mean gap shrinks by less than 1 %."""
    plan = plan_checks(hold_settings(), noise=NoiseModel(18000 * 0.10**2, 18000 * 0.03**2, 6),
                       prior=demo_prior(), lock=DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0),
                       reference_inversion=0.72, reference_stderr=0.02, check_share=0.025)
    t = plan.test
    rng = np.random.default_rng(11)
    checks = 250_000
    z = stats.norm.rvs(size=(checks, 3), random_state=rng)
    reading = rho * z[:, 0] + math.sqrt(1.0 - rho**2) * z[:, 2]
    upper = lower = inversion = 0.0
    clock = 0.0
    alarms = run = soon = 0
    for (phase_z, drop_z, _), read_z in zip(z, reading):
        first = clock
        clock += plan.check_s
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
                           statistic=max(upper, lower), off_peak=abs(read_z) >= OFF_PEAK_Z)
        soon += after["soon"]
        run = after["run"]
        clock = after["due_clock"]
    assert soon > 0
    assert clock / checks >= 0.99 * plan.inputs["mean_gap_s"]
    interval_h = clock / alarms / 3600.0
    assert interval_h == pytest.approx(plan.false_alarm_interval_h, rel=0.25)
    assert interval_h > 8.0


def test_next_check_comes_at_once_after_an_off_peak_reading_within_the_run_limit():
    """Held or corrected off the peak: at once, not a recheck, counted in the rechecks' run;
    past recheck_run_limit the plan's interval; an alarm or a plain check is unchanged."""
    plan = _test_plan(600.0)
    limit = recheck_run_limit(plan.test)
    for action in ("hold", "correct"):
        at_once = next_check(plan, action=action, clock_s=1000.0, first_shot_s=990.0, run=0,
                             off_peak=True)
        assert at_once == {"due_clock": 1000.0, "recheck": False, "sooner": False,
                           "soon": True, "run": 1}
    last = next_check(plan, action="correct", clock_s=1000.0, first_shot_s=990.0, run=limit,
                      off_peak=True)
    assert not last["soon"] and last["due_clock"] == pytest.approx(990.0 + plan.interval_s)
    plain = next_check(plan, action="correct", clock_s=1000.0, first_shot_s=990.0, run=2)
    assert not plain["soon"] and plain["run"] == 0
    assert plain["due_clock"] == pytest.approx(990.0 + plan.interval_s)
    again = next_check(plan, action="recheck", clock_s=1000.0, first_shot_s=990.0, run=0,
                       off_peak=True)
    assert again["recheck"] and not again["soon"] and again["due_clock"] == 1000.0


def test_a_poor_sources_step_is_walked_back_at_once():
    """The session-8 night in miniature: a lock whose drift rate is known to 3 Hz/s checks an
    hour later (its prediction uncertain by about 10 kHz) and reads the set-point -13.3 kHz from
    the peak, +-2.6 kHz by the check's own noise. The innovation's z is about 1.2 (no alarm,
    no recheck); the reading's own z is about -5, the correction is capped at
    max_correction_hz: the next checks come at once, never move the detuning by more than
    max_correction_hz, and the first check whose reading is within its noise leaves the
    set-point within max_correction_hz of the peak, within four checks (minutes of rig time),
    without an alarm."""
    settings, prior, plan = hold_settings(), demo_prior(), _test_plan()
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 3.0, 20.0)
    peak, held, phase_sd = 13_300.0, 0.0, 2600.0 * DEMO_SLOPE
    rng = np.random.default_rng(7)
    clock, first, run = plan.interval_s, plan.interval_s - plan.check_s, 0
    upper = lower = inversion = 0.0
    checks = 0
    while True:
        noise = 0.0 if checks == 0 else phase_sd * rng.standard_normal()
        a = assess_check(settings, result=_check(math.pi + DEMO_SLOPE * (held - peak) + noise,
                                                 phase_sd, clock),
                         detuning_hz=held, lock=lock, prior=prior, plan=plan, upper=upper,
                         lower=lower, inversion=inversion, reference_inversion=0.72,
                         reference_stderr=0.02, next_interval_s=plan.interval_s)
        checks += 1
        if checks == 1:
            assert a.innovation.z == pytest.approx(1.2, abs=0.2)
            assert a.reading_z == pytest.approx(-13.3 / 2.6, rel=1e-6)
            assert a.action == "correct" and a.off_peak and "at once" in a.reason
        assert a.action != "alarm"
        assert abs(a.target_detuning_hz - held) <= settings.max_correction_hz + 1e-9
        after = next_check(plan, action=a.action, clock_s=clock + 1.0, first_shot_s=first,
                           run=run, statistic=max(a.upper, a.lower), off_peak=a.off_peak)
        lock, upper, lower, inversion = a.lock, a.upper, a.lower, a.inversion
        if not a.off_peak:
            ended_at = a.target_detuning_hz
            break
        held, run = a.target_detuning_hz, after["run"]
        assert after["due_clock"] == clock + 1.0
        first, clock = after["due_clock"], after["due_clock"] + plan.check_s
    # The walk ends at the first check whose reading is within its noise; its correction leaves
    # the set-point within one correction of the peak, minutes after the step's first check.
    assert 2 <= checks <= 4
    assert clock - plan.interval_s < 15 * 60.0
    assert abs(ended_at - peak) < settings.max_correction_hz
    # Without the reading's say, the second check would have waited the whole interval.
    plain = next_check(plan, action="correct", clock_s=plan.interval_s, first_shot_s=first,
                       run=0, statistic=0.0)
    assert plain["due_clock"] - plan.interval_s > 0.9 * plan.interval_s
