"""A recheck holds the set-point until the check at once confirms it
(autotune.analysis.hold_check.assess_check: a recheck's ``target_detuning_hz`` is the present
detuning, ``lock_target_hz`` the lock's correction; the night applies it at the run's limit or
when the budget cannot pay for the check at once).

Why (benchmarks/README.md, session 9): on a poor source's dev night one reading 9.7 kHz off the
peak (z -3.7 of its own noise) with the set-point on the peak (the simulator's truth: -0.04 kHz)
brought a recheck whose correction moved the set-point +4.85 kHz; the checks that followed read
that move as a change the other way and came at once six times (4.5 min of beam, a retune's), and
the night's budget ran out before its second step. A warning-zone signal is confirmed before
anything is acted on: a second sample at once, the action after it (common practice in
statistical process control; J. M. Lucas, J. Quality Technology 14, 51 (1982), from memory)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hold_helpers import DEMO_SLOPE, demo_prior, hold_settings
from scipy import stats

from autotune.analysis.hold import DriftLock, SequentialTest, assess_check
from autotune.analysis.hold_check import CONTRADICTION_Z
from autotune.analysis.hold_plan import CheckPlan
from autotune.analysis.search_types import PointResult


def _check(phase_shift: float, phase_sd: float, clock: float) -> PointResult:
    return PointResult(inversion=0.72, inversion_stderr=0.06, phase_shift=phase_shift,
                       phase_shift_stderr=phase_sd, absorption=0.015, absorption_stderr=0.004,
                       contrast_empty=0.45, contrast_empty_stderr=0.03,
                       contrast_one_photon=0.405, contrast_one_photon_stderr=0.03,
                       identified=True, clock_s=clock, shots=3600)


def _plan(interval_s: float = 600.0) -> CheckPlan:
    # k 1.0, h 3.5, w 1.75 for the phase; the inversion's chart out of the way (its drop is 0).
    test = SequentialTest(1.0, 3.5, 1.75, 0.4, 60.0, 30.0)
    return CheckPlan(interval_s=interval_s, shots_per_phase=300, check_s=24.0,
                     check_share=24.0 / interval_s, detuning_stderr_hz=3000.0,
                     design_shift_hz=5400.0, test=test, expected_delay_s=600.0,
                     step_delay_s=400.0, false_alarm_interval_h=80.0, tracking_error_hz=800.0,
                     reason="test", inputs={})


def _night(rng: np.random.Generator, checks: int, step_at: int | None = None,
           step_hz: float = 0.0, wild: float = 0.0) -> list[dict[str, float]]:
    """A night on a linear phase curve (the set-point's offset read with N(0, 3 kHz) noise,
    a share ``wild`` of the readings with four times that), the held detuning following each
    check's ``target_detuning_hz``. Per check: the
    held set-point's offset from the peak when read, the action, and the offset the set-point
    would have had if the recheck had moved to ``lock_target_hz`` (the earlier rule). On a
    linear curve the measured peak, hence the lock and the charts, do not depend on where the
    set-point is held, so both rules see the same checks."""
    settings, prior, plan = hold_settings(), demo_prior(), _plan()
    lock = DriftLock.start(0.0, 0.0, 1500.0, 0.0, 0.05, 20.0)
    phase_sd = 3000.0 * DEMO_SLOPE
    held = earlier = 0.0
    upper = lower = 0.0
    clock = 0.0
    rows = []
    recheck = confirming = False
    suspect = None
    for n in range(checks):
        clock += 24.0 if recheck else plan.interval_s
        peak = step_hz if step_at is not None and n >= step_at else 0.0
        noise = phase_sd * float(rng.standard_normal()) * (4.0 if rng.random() < wild else 1.0)
        a = assess_check(settings, result=_check(math.pi + DEMO_SLOPE * (held - peak) + noise,
                                                 phase_sd, clock),
                         detuning_hz=held, lock=lock, prior=prior, plan=plan, upper=upper,
                         lower=lower, inversion=0.0, reference_inversion=0.72,
                         reference_stderr=0.02, next_interval_s=plan.interval_s,
                         confirming=confirming, suspect=suspect)
        row = {"offset": held - peak, "earlier": earlier - peak, "action": a.action,
               "moved": a.target_detuning_hz - held, "lock_target": a.lock_target_hz,
               "confirming": confirming, "dropped": "dropped from the lock" in a.reason,
               "lock_error": a.lock.peak_hz - peak}
        if row["dropped"]:
            # The same check with the suspect reading kept in the lock (the rule before).
            kept = assess_check(settings, result=_check(
                math.pi + DEMO_SLOPE * (held - peak) + noise, phase_sd, clock),
                detuning_hz=held, lock=lock, prior=prior, plan=plan, upper=upper, lower=lower,
                inversion=0.0, reference_inversion=0.72, reference_stderr=0.02,
                next_interval_s=plan.interval_s, confirming=confirming)
            row["kept_lock_error"] = kept.lock.peak_hz - peak
        rows.append(row)
        suspect = {"peak_hz": a.peak_hz if a.usable else None,
                   "variance_hz2": a.peak_variance_hz2, "lock_before": lock.to_dict()}
        if a.action == "alarm":
            break
        if a.action == "recheck":
            # Held unless it confirms a reading taken just before; an unreadable check (out of
            # the capture range) moves under neither rule.
            assert confirming or a.target_detuning_hz == held
            earlier = a.lock_target_hz if a.usable else held
        else:
            earlier = a.target_detuning_hz
        held = a.target_detuning_hz
        lock, upper, lower = a.lock, a.upper, a.lower
        recheck = a.action == "recheck"
        confirming = recheck and a.usable
    return rows


def test_a_recheck_holds_and_carries_the_locks_correction():
    """A check whose innovation takes the upper chart above its warning level (z 3 against
    k 1, w 1.75) is a recheck: the detuning is held, and the lock's correction (bounded by
    max_correction_hz, towards the measured peak) is carried in ``lock_target_hz``."""
    settings, prior, plan = hold_settings(), demo_prior(), _plan()
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.05, 20.0)
    phase_sd = 3000.0 * DEMO_SLOPE
    # The set-point held at 0, the peak read at +9.5 kHz (the reading -9.5 kHz off it).
    a = assess_check(settings, result=_check(math.pi - DEMO_SLOPE * 9500.0, phase_sd, 600.0),
                     detuning_hz=0.0, lock=lock, prior=prior, plan=plan, upper=0.0, lower=0.0,
                     inversion=0.0, reference_inversion=0.72, reference_stderr=0.02,
                     next_interval_s=plan.interval_s)
    assert a.action == "recheck"
    assert a.upper > plan.test.warning and a.upper < plan.test.threshold
    assert a.target_detuning_hz == 0.0
    assert 0.0 < a.lock_target_hz <= settings.max_correction_hz
    assert "held until it confirms" in a.reason
    # The same reading taken at once after another: it confirms, and the set-point moves.
    b = assess_check(settings, result=_check(math.pi - DEMO_SLOPE * 9500.0, phase_sd, 600.0),
                     detuning_hz=0.0, lock=lock, prior=prior, plan=plan, upper=0.0, lower=0.0,
                     inversion=0.0, reference_inversion=0.72, reference_stderr=0.02,
                     next_interval_s=plan.interval_s, confirming=True)
    assert b.action == "recheck" and b.target_detuning_hz == a.lock_target_hz


def _after_rechecks(wild: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    held, earlier = [], []
    for _ in range(40):
        rows = _night(rng, 300, wild=wild)
        for before, row in zip(rows, rows[1:]):
            if before["action"] == "recheck":
                held.append(abs(row["offset"]))
                earlier.append(abs(row["earlier"]))
    return np.array(held), np.array(earlier)


def test_wild_readings_leave_the_held_set_point_nearer_the_peak():
    """Seeded quiet nights (the peak still, 40 nights of 300 checks) whose readings have heavier
    tails than their stated noise (5 % of them with four times it, which puts 3.8 % beyond 2.5
    and 2.5 % beyond 3 of the stated standard errors: the poor-source dev nights' journals had 4
    and 3 of 81 readings there against the simulator's truth, 4.9 % and 3.7 %, where a normal
    law gives 1.2 % and 0.27 %, scipy.stats.norm): at each check that
    follows a recheck, the set-point held for confirmation is nearer the peak than the one the
    earlier rule would have moved to the lock's correction (paired Wilcoxon signed-rank test,
    scipy.stats.wilcoxon, one-sided, p < 1e-3)."""
    held, earlier = _after_rechecks(0.05, 20261205)
    assert len(held) >= 100
    assert 2.0 * stats.norm.sf(2.5) == pytest.approx(0.0124, abs=1e-4)
    wild_tail = 0.95 * 2.0 * stats.norm.sf(2.5) + 0.05 * 2.0 * stats.norm.sf(2.5 / 4.0)
    assert wild_tail == pytest.approx(0.038, abs=1e-3)
    assert stats.wilcoxon(held, earlier, alternative="less").pvalue < 1e-3


def test_normal_readings_lose_little_by_the_wait():
    """The same nights with readings as noisy as stated (a normal law): there the lock's
    correction is the best estimate and moving at once is right; holding costs the check at
    once's seconds, and the set-point held is then at most 1.5 kHz further from the peak in
    root mean square (a quarter of the 5.4 kHz design shift) than the one moved."""
    held, earlier = _after_rechecks(0.0, 20261205)
    assert len(held) >= 50
    assert math.sqrt(np.mean(held**2)) - math.sqrt(np.mean(earlier**2)) < 1500.0


def test_a_step_raises_the_alarm_with_the_set_point_held():
    """A 10 kHz step on the same curve (a 15 kHz one raises the alarm at its first check): the
    alarm comes at the same check as under the earlier rule (the charts read the measured peak,
    not the held set-point), within four checks, and the first recheck after the step held the
    set-point."""
    rng = np.random.default_rng(3)
    rows = _night(rng, 60, step_at=20, step_hz=10_000.0)
    assert rows[-1]["action"] == "alarm"
    after_step = rows[20:]
    assert len(after_step) <= 4
    first = next(r for r in after_step if r["action"] == "recheck")
    assert not first["confirming"] and first["moved"] == 0.0


def _dropped(wild: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    dropped, kept = [], []
    for _ in range(100):
        for row in _night(rng, 300, wild=wild):
            if row["dropped"]:
                dropped.append(abs(row["lock_error"]))
                kept.append(abs(row["kept_lock_error"]))
    return np.array(dropped), np.array(kept)


def test_a_contradicted_wild_reading_is_dropped_from_the_lock():
    """Seeded quiet nights as above (100 of them) with 5 % wild readings: where the check at once contradicts
    the suspect reading before it (CONTRADICTION_Z, scipy.stats.norm's two-sided 5 % point),
    the lock that dropped the suspect reading is nearer the peak than the one that kept it
    (paired Wilcoxon signed-rank test, scipy.stats.wilcoxon, one-sided, p < 1e-3)."""
    assert CONTRADICTION_Z == pytest.approx(stats.norm.isf(0.025), rel=1e-12)
    dropped, kept = _dropped(0.05, 20261205)
    assert len(dropped) >= 50
    assert stats.wilcoxon(dropped, kept, alternative="less").pvalue < 1e-3


def test_with_normal_readings_the_drop_costs_little():
    """With readings as noisy as stated the drop throws away a good reading now and then: the
    lock that dropped it is then at most 0.5 kHz further from the peak in root mean square
    than the one that kept it (a tenth of the 5.4 kHz design shift)."""
    dropped, kept = _dropped(0.0, 20261205)
    assert len(dropped) >= 50
    assert math.sqrt(np.mean(dropped**2)) - math.sqrt(np.mean(kept**2)) < 500.0
