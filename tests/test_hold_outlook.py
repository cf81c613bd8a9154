"""The night's outlook before its first check (autotune.analysis.hold_outlook), pure: the time
its checks take to confirm a thermal step, from the rig's measured signal and the budget, and
what would bring it within the 15 minutes a night accepts without a warning.

Outside references: the time to confirm is checked against a seeded simulation of the checks
and their CUSUM (numpy draws of normal innovations, a step landing uniformly between two
checks, the next check at once above the warning level: E. S. Page, Biometrika 41, 100 (1954);
M. R. Reynolds, R. W. Amin and J. C. Arnold, Technometrics 32, 371 (1990)); what would bring it
within is checked by planning again with that change alone."""

from __future__ import annotations

import dataclasses
import math
from types import SimpleNamespace

import numpy as np
import pytest
from hold_helpers import demo_prior, hold_settings

from autotune.analysis.hold import (
    CONFIRM_WITHIN_S,
    BeamBudget,
    DriftLock,
    NoiseModel,
    SignalModel,
    StepOutlook,
    checks_share,
    night_outlook,
    outlook_due,
    plan_checks,
    plan_night,
    reference_add,
    step_outlook,
)
from autotune.analysis.hold_budget import checks_share_at
from autotune.analysis.hold_plan import step_delay_of

STEP_HZ = 15e3
SHARE = 0.025  # half the default 5 % budget


def _signal(atoms_per_shot: float) -> SignalModel:
    return SignalModel(atoms_per_shot, atoms_per_shot, 0.8, 0.6, 1.0, 8)


def _inputs(atoms_per_shot: float) -> dict:
    signal = _signal(atoms_per_shot)
    return dict(noise=NoiseModel(signal.phase_variance_shots, 18000 * 0.03**2 * 0.11
                                 / atoms_per_shot, 6),
                signal=signal, prior=demo_prior(),
                lock=DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0),
                reference_inversion=0.72, reference_stderr=0.02, check_share=SHARE)


def _outlook(atoms_per_shot: float) -> tuple[StepOutlook, object, dict]:
    settings = hold_settings()
    inputs = _inputs(atoms_per_shot)
    plan = plan_checks(settings, step_rate_per_s=1.0 / 14400.0, **inputs)
    return step_outlook(settings, plan=plan, step_rate_per_s=1.0 / 14400.0, **inputs), plan, \
        inputs


def test_a_good_rig_confirms_a_step_within_15_min_and_says_so_without_a_warning():
    """The demo rig's signal (0.11 detected atoms per shot): the plan's own time to confirm,
    well within 15 min; no warning and nothing to change."""
    outlook, plan, _ = _outlook(0.11)
    assert outlook.met and outlook.warning is None
    assert outlook.confirm_s == plan.step_delay_s < CONFIRM_WITHIN_S
    assert outlook.budget_fraction_needed is None and outlook.atoms_factor_needed is None
    assert "within 15 min" in outlook.reason
    assert StepOutlook.from_dict(outlook.to_dict()) == outlook


def test_a_poor_rig_is_warned_with_what_would_bring_it_within():
    """A fifth of the demo's atoms (0.022 per shot): its checks, at their longest interval,
    confirm a 15 kHz step after more than 15 min; the warning is one line naming the
    budget_fraction and the factor on the detected atoms that would do, and each, planned
    again alone, does confirm within 15 min while a tenth less does not (the least, to the
    search's 5 %)."""
    settings = hold_settings()
    outlook, _, inputs = _outlook(0.022)
    assert not outlook.met and outlook.confirm_s > CONFIRM_WITHIN_S
    assert outlook.interval_s <= settings.max_interval_s
    line = outlook.warning
    # One console line: at most 150 characters with its time, level, stage and name (42).
    assert "\n" not in line and len(line) <= 150 - 42
    assert f"budget_fraction {outlook.budget_fraction_needed:.2g}" in line
    assert f"atoms/shot x{outlook.atoms_factor_needed:.2g}" in line
    assert "budget_fraction 0.05" in outlook.reason and "the night runs as configured" in \
        outlook.reason

    def delay(share: float = SHARE, atoms: float = 1.0) -> float:
        signal = _signal(0.022 * atoms)
        noise = inputs["noise"]
        again = plan_checks(settings, **{**inputs, "check_share": share, "signal": signal,
                                         "noise": NoiseModel(noise.phase_variance_shots / atoms,
                                                             noise.inversion_variance_shots
                                                             / atoms, 6)},
                            step_rate_per_s=1.0 / 14400.0)
        return again.step_delay_s

    factor = outlook.budget_fraction_needed / settings.budget_fraction
    assert delay(share=SHARE * factor) <= CONFIRM_WITHIN_S
    assert delay(share=SHARE * factor / 1.1) > CONFIRM_WITHIN_S
    assert delay(atoms=outlook.atoms_factor_needed) <= CONFIRM_WITHIN_S
    assert delay(atoms=outlook.atoms_factor_needed / 1.1) > CONFIRM_WITHIN_S


def test_the_step_size_a_poor_night_confirms_within_15_min():
    """With a small budget (1 %) on the demo's signal the checks are few, and a larger step is
    seen sooner: the outlook names the least step that the night as configured (this plan's
    checks, planned for 15 kHz) confirms within 15 min, and this plan's checks do confirm it
    within, one a tenth smaller not."""
    settings = hold_settings(budget_fraction=0.01)
    inputs = {**_inputs(0.11), "check_share": 0.005}
    plan = plan_checks(settings, step_rate_per_s=1.0 / 14400.0, **inputs)
    outlook = step_outlook(settings, plan=plan, step_rate_per_s=1.0 / 14400.0, **inputs)
    assert not outlook.met and outlook.step_hz_confirmed is not None
    assert f"steps >= {math.ceil(outlook.step_hz_confirmed / 100.0) / 10:.1f} kHz" in \
        outlook.warning
    assert step_delay_of(plan, STEP_HZ) == plan.step_delay_s
    assert step_delay_of(plan, outlook.step_hz_confirmed) <= CONFIRM_WITHIN_S
    assert step_delay_of(plan, max(outlook.step_hz_confirmed / 1.1, STEP_HZ)) > CONFIRM_WITHIN_S


def test_checks_half_an_hour_apart_confirm_no_step_within_15_min_and_the_outlook_says_so():
    """A step landing uniformly between checks waits half an interval in the mean for the first
    check after it (common practice: the mean residual time of a fixed period), so checks
    1800 s apart (the poor rig of the test above, 0.022 atoms per shot) confirm no step, however
    large, within 900 s in the mean: the outlook names no step size (a plan made again for a
    larger step would be another night, with shorter intervals)."""
    outlook, plan, _ = _outlook(0.022)
    assert plan.interval_s / 2.0 >= CONFIRM_WITHIN_S
    assert outlook.step_hz_confirmed is None
    assert "steps >=" not in outlook.warning
    assert step_delay_of(plan, 1e6) > CONFIRM_WITHIN_S


def _rows(atoms_per_shot: float) -> list[list[float]]:
    """A calibration's noise row (hold_check.noise_row) of ``_signal(atoms_per_shot)``."""
    signal, shots = _signal(atoms_per_shot), 18000
    return [[math.sqrt(signal.phase_variance_shots / shots), 0.03, shots,
             round(atoms_per_shot * shots / 2), round(atoms_per_shot * shots / 2), 0.8, 0.6,
             20.0, 20]]


def test_a_later_outlook_names_the_budget_fraction_the_night_needs_with_its_beam_spent():
    """Four hours into an eight-hour night whose retunes took most of the budget, the checks'
    share is what is left of the ceiling, not half the budget: the budget_fraction the outlook
    names is the least whose night (the same beam spent, the ceiling scaled with the fraction:
    hold_budget.checks_share) confirms a 15 kHz step within 15 min, and a tenth less does not
    (the share's own ratio to half the budget, 4 times larger here, would overstate it)."""
    settings = hold_settings()
    rows = _rows(0.022)
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0)
    reference = reference_add({"weight": 0.0, "weighted": 0.0}, 0.72, 0.02)

    def night(fraction: float):
        s = dataclasses.replace(settings, budget_fraction=fraction)
        budget = BeamBudget.of(s, elapsed_s=4 * 3600.0, remaining_s=4 * 3600.0, spent_s=1350.0)
        return plan_night(s, budget=budget, rows=rows, prior=demo_prior(), lock=lock,
                          reference=reference, recovery_beam_s=300.0, recoveries=1)

    plan, share = night(0.05)
    assert share["share"] < 0.5 * 0.05 / 2
    for fraction in (0.05, 0.1, 0.3, 1.0):
        s = dataclasses.replace(settings, budget_fraction=fraction)
        budget = BeamBudget.of(s, elapsed_s=4 * 3600.0, remaining_s=4 * 3600.0, spent_s=1350.0)
        assert checks_share_at(share, 0.05, fraction) == pytest.approx(
            checks_share(s, budget, recovery_beam_s=300.0, recoveries=1)["share"], rel=1e-12)
    outlook = night_outlook(settings, plan=plan, share=share, rows=rows, prior=demo_prior(),
                            lock=lock, reference=reference)
    assert not outlook.met
    needed = outlook.budget_fraction_needed
    assert needed is not None
    assert night(needed)[0].step_delay_s <= CONFIRM_WITHIN_S
    assert night(needed / 1.1)[0].step_delay_s > CONFIRM_WITHIN_S


@pytest.mark.parametrize("atoms_per_shot", [0.11, 0.022])
def test_the_time_to_confirm_matches_a_simulation_of_the_checks(atoms_per_shot):
    """The outlook's time to confirm is the plan's: a step of ``z`` innovation standard
    deviations lands uniformly between two checks; each check adds ``N(z, 1) - k`` to a
    one-sided CUSUM started from its in-control state (a long quiet stretch simulated first);
    at or above the warning level ``w`` the next check comes at once (one check's beam time
    later), else an interval later; the alarm at ``h``. 4,000 seeded nights (numpy): the
    planned time is never short of the simulated mean by more than 5 %, and long by at most
    35 %: the plan counts each check before the first flag as flagging with the first check's
    probability from the in-control state, while the chart in fact keeps what each check
    added, so that where a step needs several checks (a poor rig: 0.022 atoms per shot,
    planned 50 min, simulated 38 min) the plan is pessimistic; with one check enough (the
    demo's signal) the two agree within 5 %. The simulation leaves out the lock's corrections
    after each check, which take part of a step in and make it slower to confirm."""
    outlook, plan, _ = _outlook(atoms_per_shot)
    t = plan.test
    z = plan.inputs["step_z"]
    rng = np.random.default_rng(31)
    nights = 4000
    statistic = np.zeros(nights)
    for _ in range(400):  # in control: the chart's stationary state (an alarm restarts it)
        statistic = np.maximum(0.0, statistic + rng.standard_normal(nights) - t.reference)
        statistic[statistic > t.threshold] = 0.0
    delays = np.empty(nights)
    for n in range(nights):
        s = statistic[n]
        clock = rng.uniform(0.0, plan.interval_s)  # to the first check after the step
        while True:
            s = max(0.0, s + rng.normal(z, 1.0) - t.reference)
            clock += plan.check_s
            if s > t.threshold:
                break
            clock += 0.0 if s >= t.warning else plan.interval_s - plan.check_s
        delays[n] = clock
    assert outlook.confirm_s == plan.step_delay_s
    assert 0.95 * delays.mean() <= plan.step_delay_s <= 1.35 * delays.mean()


def test_a_later_plan_tells_the_outlook_again_only_when_it_crosses_the_line():
    """hold_outlook.outlook_due: the first plan always; a later one only when its expected time
    to confirm a step has crossed CONFIRM_WITHIN_S either way since the last outlook told.
    The line is the night study's worst recovery target (issue 22: 15 min), less the retune."""
    fast = SimpleNamespace(step_delay_s=0.5 * CONFIRM_WITHIN_S)
    slow = SimpleNamespace(step_delay_s=2.0 * CONFIRM_WITHIN_S)
    never = SimpleNamespace(step_delay_s=float("inf"))
    at_line = SimpleNamespace(step_delay_s=CONFIRM_WITHIN_S)
    assert outlook_due(None, fast) and outlook_due(None, slow)
    assert not outlook_due({"met": True}, fast) and not outlook_due({"met": True}, at_line)
    assert outlook_due({"met": True}, slow) and outlook_due({"met": True}, never)
    assert outlook_due({"met": False}, fast) and not outlook_due({"met": False}, never)


def test_a_time_just_over_the_line_is_not_printed_as_the_line():
    """15.3 min against 15 must not read "15 min > 15" (the review found it at 900-930 s)."""
    outlook, _, _ = _outlook(0.11)
    over = dataclasses.replace(outlook, confirm_s=918.0, met=False)
    assert "confirmed in 15.3 min > 15" in over.warning
    later = dataclasses.replace(outlook, confirm_s=1260.0, met=False)
    assert "confirmed in 21 min > 15" in later.warning
