"""The night's pure core (autotune.analysis.hold): the sequential test against its published run lengths,
the drift lock against the Kalman filter's steady state and on a synthetic ramp, the plan."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hold_helpers import hold_settings
from scipy import linalg, stats

from autotune.analysis.guided import LockPrior
from autotune.analysis.hold import (
    CheckPlan,
    DriftLock,
    HoldSettings,
    NoiseModel,
    SequentialTest,
    assess_check,
    cusum_arl,
    cusum_threshold,
    floor_shift_hz,
    known_cubic,
    peak_after_change,
    plan_checks,
    two_sided_arl,
)
from autotune.analysis.hold_plan import SOONER_INTERVAL
from autotune.analysis.search import PointResult

SLOPE = 9.0e-5  # rad/Hz, of the order of the demo rig's (docs/physics.md section 5b)


def _prior(**changes) -> LockPrior:
    base = dict(velocity_m_per_s=510.0, velocity_stderr_m_per_s=3.0, detuning_hz=0.0,
                slope_rad_per_hz=SLOPE, slope_stderr_rad_per_hz=1e-5, cubic_rad_per_hz3=0.0,
                cubic_stderr_rad_per_hz3=1e-14, phase_at_peak_rad=math.pi,
                phase_at_peak_stderr_rad=0.03, absorption_min=0.015, absorption_min_stderr=0.002,
                absorption_curvature=5.0, absorption_curvature_stderr=1.0, inversion=0.72)
    base.update(changes)
    return LockPrior(**base)


def _check(phase_shift: float, phase_sd: float, clock: float, *, inversion: float = 0.72,
           shots: int = 3600, contrast_ratio: float = 0.9) -> PointResult:
    return PointResult(inversion=inversion, inversion_stderr=0.06, phase_shift=phase_shift,
                       phase_shift_stderr=phase_sd, absorption=0.015, absorption_stderr=0.004,
                       contrast_empty=0.45, contrast_empty_stderr=0.03,
                       contrast_one_photon=0.45 * contrast_ratio, contrast_one_photon_stderr=0.03,
                       identified=True, clock_s=clock, shots=shots)


def _plan(k: float = 1.0, h: float = 3.5, interval_s: float = 600.0) -> CheckPlan:
    test = SequentialTest(k, h, 0.5 * h, 0.4, 6.0, 3.0)
    return CheckPlan(interval_s=interval_s, shots_per_phase=300, check_s=24.0,
                     check_share=24.0 / interval_s, detuning_stderr_hz=3000.0,
                     design_shift_hz=5400.0, test=test, expected_delay_s=600.0,
                     step_delay_s=400.0, false_alarm_interval_h=80.0, tracking_error_hz=800.0,
                     reason="test", inputs={})


# --------------------------------------------------------------------------------------------
# The sequential test
# --------------------------------------------------------------------------------------------


def _brook_evans_arl(shift: float, reference: float, threshold: float, states: int = 300) -> float:
    """One-sided CUSUM run length by the Markov-chain method of D. Brook and D. A. Evans,
    Biometrika 59, 539 (1972): the statistic discretised on [0, h] in ``states`` cells."""
    width = 2.0 * threshold / (2 * states - 1)
    centres = width * np.arange(states)
    upper = centres[None, :] + 0.5 * width - centres[:, None] + reference - shift
    lower = centres[None, :] - 0.5 * width - centres[:, None] + reference - shift
    cells = stats.norm.cdf(upper) - stats.norm.cdf(lower)
    cells[:, 0] = stats.norm.cdf(upper[:, 0])  # the cell of 0 takes every step that ends below
    run = np.linalg.solve(np.eye(states) - cells, np.ones(states))
    return float(run[0])


def _run_lengths(shift: float, reference: float, threshold: float, runs: int, seed: int,
                 two_sided: bool = False) -> np.ndarray:
    """Seeded run lengths of Page's CUSUM on N(shift, 1) data (vectorised over the runs)."""
    rng = np.random.default_rng(seed)
    upper = np.zeros(runs)
    lower = np.zeros(runs)
    lengths = np.zeros(runs, dtype=int)
    alive = np.ones(runs, dtype=bool)
    n = 0
    while alive.any():
        n += 1
        z = rng.normal(shift, 1.0, size=int(alive.sum()))
        upper[alive] = np.maximum(0.0, upper[alive] + z - reference)
        lower[alive] = np.maximum(0.0, lower[alive] - z - reference)
        done = upper[alive] > threshold
        if two_sided:
            done |= lower[alive] > threshold
        index = np.flatnonzero(alive)[done]
        lengths[index] = n
        alive[index] = False
    return lengths


def test_run_lengths_match_the_published_table():
    """k = 0.5, h = 4 and 5: the Markov chain of Brook and Evans reproduces the tabulated run
    lengths within 1 %, and Siegmund's approximation (the one the night plans with) within 4 %
    up to a one-sigma shift and 10 % at two sigma (it is known to be coarser for large shifts).

    Reference: the run-length table of the one-sided CUSUM with k = 0.5 in D. C. Montgomery,
    Introduction to Statistical Quality Control (from memory): h = 4: 336 in control, 26.6 at
    half a sigma, 8.38 at one sigma, 3.34 at two sigma; h = 5: 930, 38.0, 10.4 and 4.01."""
    table = {(4, 0.0): 336, (4, 0.5): 26.6, (4, 1.0): 8.38, (4, 2.0): 3.34,
             (5, 0.0): 930, (5, 0.5): 38.0, (5, 1.0): 10.4, (5, 2.0): 4.01}
    for (h, shift), published in table.items():
        assert _brook_evans_arl(shift, 0.5, h) == pytest.approx(published, rel=0.01), (h, shift)
        tolerance = 0.04 if shift <= 1.0 else 0.10
        assert cusum_arl(shift, 0.5, h) == pytest.approx(published, rel=tolerance), (h, shift)


def test_step_is_pages_recursion():
    """One step: S+ = max(0, S+ + z - k), S- = max(0, S- - z - k) (E. S. Page, Biometrika 41,
    100 (1954))."""
    assert SequentialTest.step(1.0, 2.0, 0.3, 0.5) == pytest.approx((0.8, 1.2))
    assert SequentialTest.step(0.1, 0.0, -2.0, 0.5) == pytest.approx((0.0, 1.5))


@pytest.mark.parametrize(("shift", "reference", "threshold"),
                         [(0.0, 0.5, 4.0), (1.0, 0.5, 4.0), (0.0, 1.0, 3.3), (3.0, 1.0, 3.3)])
def test_false_alarm_rate_and_delay_on_seeded_data(shift, reference, threshold):
    """Run lengths of the one-sided CUSUM on seeded normal data: the mean is Brook and Evans's
    Markov-chain value within four standard errors, and Siegmund's approximation within 6 %
    (12 % for a three-sigma shift, where it is coarser).

    References: D. Brook and D. A. Evans, Biometrika 59, 539 (1972) (computed here); D.
    Siegmund, Sequential Analysis, Springer 1985 (``b = h + 1.166``, from memory)."""
    runs = 3000 if shift == 0.0 else 6000
    lengths = _run_lengths(shift, reference, threshold, runs, seed=20261207)
    mean, se = lengths.mean(), lengths.std(ddof=1) / math.sqrt(runs)
    markov = _brook_evans_arl(shift, reference, threshold)
    assert abs(mean - markov) < 4.0 * se, (mean, se, markov)
    tolerance = 0.06 if shift - reference <= 1.0 else 0.12
    assert cusum_arl(shift, reference, threshold) == pytest.approx(markov, rel=tolerance)


def test_two_sided_run_length_adds_the_alarm_rates():
    """The two-sided chart in control, at a design the night uses (k 1.1, h 3.2): seeded run
    lengths match 1/ARL = 1/ARL+ + 1/ARL- from the Markov chain (Brook and Evans) within four
    standard errors; Siegmund's approximation is within 10 % (it is about 7 % long here, so
    the night's planned false-alarm interval is that much optimistic)."""
    k, h = 1.1, 3.2
    lengths = _run_lengths(0.0, k, h, 4000, seed=7, two_sided=True)
    mean, se = lengths.mean(), lengths.std(ddof=1) / math.sqrt(len(lengths))
    markov = 1.0 / (2.0 / _brook_evans_arl(0.0, k, h))
    assert abs(mean - markov) < 4.0 * se, (mean, se, markov)
    assert two_sided_arl(0.0, k, h) == pytest.approx(markov, rel=0.10)


def test_threshold_gives_the_asked_run_length():
    """cusum_threshold inverts Siegmund's in-control run length."""
    for k in (0.3, 0.7, 1.5):
        for arl in (50.0, 500.0, 5000.0):
            assert cusum_arl(0.0, k, cusum_threshold(k, arl)) == pytest.approx(arl, rel=1e-6)
    assert cusum_threshold(1.0, 1.0) == 0.0


# --------------------------------------------------------------------------------------------
# The drift lock
# --------------------------------------------------------------------------------------------


def test_lock_covariance_reaches_the_riccati_steady_state():
    """Checks every 600 s with a 3 kHz error: the lock's prior covariance converges to the
    solution of the discrete algebraic Riccati equation of the same model (scipy.linalg's
    solve_discrete_are, the filtering DARE with A^T and H^T; common practice)."""
    interval, noise = 600.0, 3000.0**2
    lock = DriftLock.start(0.0, 0.0, 5e3, 0.0, 3.0, 20.0)
    for k in range(400):
        lock, _ = lock.update((k + 1) * interval, 0.0, noise, max_gain=1.0)
    prior = lock.predict(lock.clock_s + interval)
    a = np.array([[1.0, interval], [0.0, 1.0]])
    q = np.array(prior.covariance) - a @ np.array(lock.covariance) @ a.T
    h = np.array([[1.0, 0.0]])
    riccati = linalg.solve_discrete_are(a.T, h.T, q, np.array([[noise]]))
    assert np.array(prior.covariance) == pytest.approx(riccati, rel=1e-6)


def test_lock_gain_is_bounded():
    """A lock that knows nothing takes at most max_gain of the first innovation."""
    lock = DriftLock.start(0.0, 0.0, 1e6, 0.0, 1.0, 20.0)
    after, innovation = lock.update(10.0, 10_000.0, 1e4, max_gain=0.5)
    assert innovation.gain == pytest.approx(0.5)
    assert after.peak_hz == pytest.approx(5000.0, rel=1e-9)


def _simulate_hold(ramp_hz_per_s: float, checks: int, *, step_at: int | None = None,
                   step_hz: float = 0.0, seed: int = 3, settings: HoldSettings | None = None,
                   plan: CheckPlan | None = None, phase_sd: float = 0.27):
    """Hold a synthetic peak ``p(t) = ramp t (+ step)`` with checks of a linear phase curve."""
    settings = settings or hold_settings()
    plan = plan or _plan()
    prior = _prior()
    rng = np.random.default_rng(seed)
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 3.0, settings.walk_hz_per_sqrt_s)
    held, upper, lower, inv = 0.0, 0.0, 0.0, 0.0
    rows = []
    for n in range(checks):
        clock = (n + 1) * plan.interval_s
        peak = ramp_hz_per_s * clock + (step_hz if step_at is not None and n >= step_at else 0.0)
        phase = math.pi + SLOPE * (held - peak) + phase_sd * rng.standard_normal()
        a = assess_check(settings, result=_check(phase, phase_sd, clock), detuning_hz=held,
                         lock=lock, prior=prior, plan=plan, upper=upper, lower=lower,
                         inversion=inv, reference_inversion=0.72, reference_stderr=0.02,
                         next_interval_s=plan.interval_s)
        rows.append({"n": n, "peak": peak, "held": held, "a": a})
        if a.action == "alarm":
            break
        lock, upper, lower, inv = a.lock, a.upper, a.lower, a.inversion
        held = a.target_detuning_hz
    return rows


def test_the_lock_follows_a_ramp():
    """A ramp of 2 Hz/s (7.2 kHz per hour, the top of the study's range) with checks every
    10 min of 3 kHz error: after ten checks the held detuning stays within a third of the
    floor's shift of the peak (rms), the rate is learned, and nothing alarms.

    Reference: the floor's shift is the detuning error whose phase error alone costs
    1 - cos(eps / 2) = 3 % of the inversion (docs/physics.md section 3's ideal fringes)."""
    settings = hold_settings(false_alarm_interval_s=1e9)
    rows = _simulate_hold(2.0, 120, settings=settings)
    assert len(rows) == 120 and all(r["a"].action != "alarm" for r in rows)
    # Held during the interval after each check: compare the set-point with the peak at the
    # middle of the interval it was aimed at.
    errors = [r["a"].target_detuning_hz - 2.0 * (r["n"] + 1.5) * 600.0 for r in rows[10:]]
    rms = math.sqrt(np.mean(np.square(errors)))
    assert rms < floor_shift_hz(0.97, SLOPE) / 3.0, rms
    last = rows[-1]["a"].lock
    assert abs(last.rate_hz_per_s - 2.0) < 3.0 * last.rate_stderr_hz_per_s + 0.05


@pytest.mark.parametrize("step_hz", [15e3, -15e3])
def test_a_thermal_step_raises_the_alarm_within_two_checks(step_hz):
    """A 15 kHz step (five check errors) after a quiet start: the statistic on its side passes
    the warning level at the first check after the step and the threshold by the second."""
    rows = _simulate_hold(0.0, 40, step_at=20, step_hz=step_hz)
    alarm = rows[-1]["a"]
    assert alarm.action == "alarm" and alarm.alarm == ("upper" if step_hz > 0 else "lower")
    assert rows[-1]["n"] - 20 <= 1
    if rows[-1]["n"] == 21:
        assert rows[-2]["a"].action == "recheck"


def test_an_unusable_check_is_repeated_before_the_alarm():
    """A check out of the capture range asks for a repeat at once; the alarm comes only when
    the repeat is unusable too."""
    settings, prior, plan = hold_settings(), _prior(), _plan()
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 1.0, 20.0)
    far = _check(math.pi + 0.8 * math.pi, 0.1, 600.0)
    common = dict(detuning_hz=0.0, lock=lock, prior=prior, plan=plan, upper=0.0, lower=0.0,
                  inversion=0.0, reference_inversion=0.72, reference_stderr=0.02,
                  next_interval_s=600.0)
    first = assess_check(settings, result=far, **common)
    assert (first.action, first.usable) == ("recheck", False)
    second = assess_check(settings, result=far, previous_unusable=True, **common)
    assert (second.action, second.alarm) == ("alarm", "out_of_range")
    # A faint one-photon fringe whose phase error is not 3 of its own standard errors inside the
    # wrap at pi (LockSettings.phase_wrap_sigmas) is unusable; 3 inside, it steers (the gate the
    # calibration's lock uses, lock_fit.phase_signal_note).
    low = assess_check(settings, result=_check(math.pi + 0.5, 1.0, 600.0, contrast_ratio=0.2),
                       previous_unusable=True, **common)
    assert low.alarm == "out_of_range" and "contrast" in low.reason and "wrap" in low.reason
    faint = assess_check(settings, result=_check(math.pi + 0.5, 0.5, 600.0, contrast_ratio=0.2),
                         previous_unusable=True, **common)
    assert faint.usable and faint.alarm is None


def test_pooled_noise_replaces_a_checks_own_error():
    """With a noise model the check's variance is the pooled variance per shot over its shots."""
    settings, prior, plan = hold_settings(), _prior(), _plan()
    lock = DriftLock.start(0.0, 0.0, 1.0, 0.0, 1.0, 20.0)
    noise = NoiseModel(phase_variance_shots=3600 * 0.2**2, inversion_variance_shots=3600 * 0.05**2,
                       measurements=5)
    a = assess_check(settings, result=_check(math.pi, 0.01, 600.0), detuning_hz=0.0, lock=lock,
                     prior=prior, plan=plan, upper=0.0, lower=0.0, inversion=0.0,
                     reference_inversion=0.72, reference_stderr=0.0, next_interval_s=600.0,
                     noise=noise)
    assert a.offset_stderr_hz == pytest.approx(0.2 / SLOPE)


def test_known_cubic_needs_two_standard_errors():
    """The stored cubic is used only when it is two standard errors from zero."""
    assert known_cubic(_prior(cubic_rad_per_hz3=3e-14, cubic_stderr_rad_per_hz3=1e-14)) == 3e-14
    assert known_cubic(_prior(cubic_rad_per_hz3=1e-14, cubic_stderr_rad_per_hz3=1e-14)) == 0.0


def test_peak_after_change_averages_the_checks_since_the_last_zero():
    """The change point is the last check whose statistic was zero; the checks after it are
    averaged with weights 1 / variance, carried to the clock by the rate."""
    recent = [{"clock_s": 0.0, "peak_hz": 0.0, "variance_hz2": 1.0, "upper": 0.0},
              {"clock_s": 10.0, "peak_hz": 100.0, "variance_hz2": 1.0, "upper": 1.2},
              {"clock_s": 20.0, "peak_hz": 130.0, "variance_hz2": 3.0, "upper": 4.0}]
    peak, sd = peak_after_change(recent, "upper", 1.0, 20.0)
    assert peak == pytest.approx((110.0 * 1.0 + 130.0 / 3.0) / (1.0 + 1.0 / 3.0))
    assert sd == pytest.approx(math.sqrt(1.0 / (1.0 + 1.0 / 3.0)))
    assert peak_after_change(recent[:1], "upper", 0.0, 0.0) is None


# --------------------------------------------------------------------------------------------
# The plan
# --------------------------------------------------------------------------------------------


def _noise(phase_sd_at_18000: float = 0.082) -> NoiseModel:
    return NoiseModel(18000 * phase_sd_at_18000**2, 18000 * 0.03**2, 6)


def test_plan_keeps_the_checks_within_their_share_and_their_shots():
    """The chosen checks take at most the share asked, at least min_shots_per_phase, and the
    test's false-alarm interval is Siegmund's for the three one-sided charts together."""
    settings = hold_settings()
    lock = DriftLock.start(0.0, 0.0, 1000.0, 1.0, 0.5, 20.0)
    plan = plan_checks(settings, noise=_noise(), prior=_prior(), lock=lock,
                       reference_inversion=0.72, reference_stderr=0.02, check_share=0.025)
    # The rechecks above the warning level and the checks brought sooner by the middle zone
    # (after SOONER_INTERVAL of the interval) take beam too: the share counts them.
    gap = plan.inputs["mean_gap_s"]
    recheck, sooner = plan.inputs["recheck_share"], plan.inputs["sooner_share"]
    assert gap == pytest.approx((1.0 - recheck - sooner) * plan.interval_s
                                + sooner * SOONER_INTERVAL * plan.interval_s
                                + recheck * plan.check_s)
    assert plan.check_share == pytest.approx(plan.check_s / gap)
    assert plan.check_share <= 0.025 + 1e-9
    assert plan.shots_per_phase >= settings.min_shots_per_phase
    assert plan.check_s == pytest.approx(2 * 6 * plan.shots_per_phase / 150.0)
    t = plan.test
    rate = 2.0 / cusum_arl(0.0, t.reference, t.threshold) + \
        1.0 / cusum_arl(0.0, t.inversion_reference, t.inversion_threshold)
    assert plan.false_alarm_interval_h == pytest.approx(gap / rate / 3600.0)
    assert plan.false_alarm_interval_h == pytest.approx(80.0, rel=0.01)
    assert 0.0 < t.warning < t.threshold
    assert CheckPlan.from_dict(plan.to_dict()) == plan


def test_a_noisier_rig_gets_more_shots_per_check():
    """Four times the phase variance: each check gets more shots (and a longer interval, the
    share being the same), so one check's error on the peak grows by less than twice."""
    settings = hold_settings()
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0)
    common = dict(prior=_prior(), lock=lock, reference_inversion=0.72, reference_stderr=0.02,
                  check_share=0.025)
    quiet = plan_checks(settings, noise=_noise(0.082), **common)
    noisy = plan_checks(settings, noise=_noise(0.164), **common)
    assert noisy.shots_per_phase > quiet.shots_per_phase
    assert noisy.detuning_stderr_hz < 2.0 * quiet.detuning_stderr_hz


def test_a_budget_too_small_for_the_least_shots_stretches_the_interval():
    """When even the longest interval cannot afford min_shots_per_phase, the plan says so and
    keeps the share with fewer but larger checks (the interval stretched)."""
    settings = hold_settings(min_shots_per_phase=2000, max_interval_s=600.0)
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0)
    plan = plan_checks(settings, noise=_noise(), prior=_prior(), lock=lock,
                       reference_inversion=0.72, reference_stderr=0.02, check_share=0.01)
    assert plan.shots_per_phase >= 2000
    assert plan.interval_s > settings.max_interval_s
    assert plan.check_s / plan.interval_s == pytest.approx(0.01)
    assert "fewer but larger checks" in plan.reason


# --------------------------------------------------------------------------------------------
# The rate during a suspected change
# --------------------------------------------------------------------------------------------


def test_an_update_without_the_rate_keeps_it_and_states_its_errors_covariance():
    """DriftLock.update(learn_rate=False): the rate is unchanged, and the covariance it states
    (Joseph form, right for any gain) is the covariance of the estimate's errors: 200,000 seeded
    draws of the state from the prior and of the measurement's noise (numpy's multivariate
    normal), within 2 % on each term."""
    lock = DriftLock.start(0.0, 100.0, 1500.0, 2.0, 0.8, 20.0)
    clock, variance = 600.0, 3000.0**2
    updated, _ = lock.update(clock, 4000.0, variance, max_gain=0.7, learn_rate=False)
    assert updated.rate_hz_per_s == lock.rate_hz_per_s
    prior = lock.predict(clock)
    rng = np.random.default_rng(31)
    truth = rng.multivariate_normal([prior.peak_hz, prior.rate_hz_per_s],
                                    np.array(prior.covariance), size=200_000)
    measured = truth[:, 0] + rng.normal(0.0, math.sqrt(variance), size=truth.shape[0])
    gain = updated.peak_hz - prior.peak_hz  # per Hz of innovation, below
    gain /= 4000.0 - prior.peak_hz
    estimate = np.column_stack([prior.peak_hz + gain * (measured - prior.peak_hz),
                                np.full(truth.shape[0], prior.rate_hz_per_s)])
    errors = np.cov((estimate - truth).T)
    stated = np.array(updated.covariance)
    assert errors[0, 0] == pytest.approx(stated[0, 0], rel=0.02)
    assert errors[1, 1] == pytest.approx(stated[1, 1], rel=0.02)
    assert errors[0, 1] == pytest.approx(stated[0, 1], rel=0.05, abs=0.02 * math.sqrt(
        stated[0, 0] * stated[1, 1]))


def test_a_check_during_a_suspected_change_does_not_teach_the_rate():
    """A check read while a phase chart is above its warning level (before or after it) moves
    the peak but not the drift rate; a quiet check teaches both."""
    settings, prior, plan = hold_settings(), _prior(), _plan()
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.5, 1.0, 20.0)
    common = dict(detuning_hz=0.0, lock=lock, prior=prior, plan=plan, lower=0.0, inversion=0.0,
                  reference_inversion=0.72, reference_stderr=0.02, next_interval_s=600.0)
    off = _check(math.pi - SLOPE * 4000.0, 0.1, 600.0)  # the peak 4 kHz above the set-point
    quiet = assess_check(settings, result=off, upper=0.0, **common)
    assert quiet.upper <= plan.test.warning and quiet.lock.rate_hz_per_s != lock.rate_hz_per_s
    suspected = assess_check(settings, result=off, upper=plan.test.warning + 0.1, **common)
    assert suspected.lock.rate_hz_per_s == lock.rate_hz_per_s
    assert suspected.lock.peak_hz != lock.predict(600.0).peak_hz
