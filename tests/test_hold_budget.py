"""The night's planning (autotune.analysis.hold), pure: the beam budget as a ceiling over random
sequences of checks and recoveries, the recovery chosen within it, and the checks sized to the
rig's signal, whose statistics are checked against seeded binomial draws (scipy.stats) and the
published run lengths of the sequential test."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

from autotune.analysis.guided import LockPrior, LockSettings
from autotune.analysis.hold import (
    OPEN_NIGHT_HORIZON_S,
    BeamBudget,
    DriftLock,
    HoldSettings,
    NoiseModel,
    SignalModel,
    StageSize,
    Unheld,
    checks_reserve_s,
    checks_share,
    choose_recovery,
    holds_as_well,
    cusum_arl,
    noise_row,
    plan_checks,
    readable_z,
)

PHASES = 6
RATE = 150.0
RETUNE = StageSize("retune", 1500, 1500, 2, 240_000, 8)
CALIBRATION = StageSize("calibrate", 0, 6000, 2, 1_500_000, 40)


def _settings(**changes) -> HoldSettings:
    base = dict(floor=0.97, budget_fraction=0.05, false_alarm_interval_s=288_000.0, max_gain=0.7,
                max_correction_hz=5000.0, min_correction_hz=100.0, min_shots_per_phase=100,
                max_shots_per_phase=100_000, max_interval_s=1800.0, walk_hz_per_sqrt_s=20.0,
                inversion_drop=0.25, ramsey_phases=PHASES, repetition_rate_hz=RATE,
                lock=LockSettings())
    base.update(changes)
    return HoldSettings(**base)


def _prior() -> LockPrior:
    return LockPrior(velocity_m_per_s=510.0, velocity_stderr_m_per_s=3.0, detuning_hz=0.0,
                     slope_rad_per_hz=9.0e-5, slope_stderr_rad_per_hz=1e-5,
                     cubic_rad_per_hz3=0.0, cubic_stderr_rad_per_hz3=1e-14,
                     phase_at_peak_rad=math.pi, phase_at_peak_stderr_rad=0.03,
                     absorption_min=0.015, absorption_min_stderr=0.002, absorption_curvature=5.0,
                     absorption_curvature_stderr=1.0, inversion=0.72)


def _signal(atoms_per_shot: float, contrast_empty: float = 0.8,
            contrast_one_photon: float = 0.6) -> SignalModel:
    return SignalModel(atoms_per_shot, atoms_per_shot, contrast_empty, contrast_one_photon, 1.0, 8)


# --------------------------------------------------------------------------------------------
# The ceiling
# --------------------------------------------------------------------------------------------


_EVENT = st.tuples(st.sampled_from(["check", "retune", "calibrate", "wait"]),
                   st.floats(0.0, 1.0), st.floats(0.0, 1.0), st.floats(0.0, 1.0))


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(events=st.lists(_EVENT, min_size=1, max_size=60),
       fraction=st.floats(0.005, 0.3), hours=st.one_of(st.none(), st.floats(0.5, 14.0)),
       check_per_phase=st.integers(50, 3000))
def test_the_budget_is_never_exceeded_over_random_nights(events, fraction, hours,
                                                         check_per_phase):
    """Whatever comes (checks of any size, retunes and calibrations that take anything up to
    the size they were given, waits), a night that pays for each action before it begins, as
    the shell does, never has more on holding than its ceiling: the budget fraction of its
    planned length, or of its rig time plus the open horizon."""
    settings_ = _settings(budget_fraction=fraction)
    night = None if hours is None else hours * 3600.0
    clock = spent = 0.0
    for kind, size_draw, used, wait in events:
        remaining = None if night is None else max(night - clock, 0.0)
        budget = BeamBudget.of(settings_, elapsed_s=clock, remaining_s=remaining, spent_s=spent)
        if kind == "check":
            beam = 2 * PHASES * max(1, int(check_per_phase * size_draw)) / RATE
            if budget.affords(beam):
                spent += beam
                clock += beam
        elif kind in ("retune", "calibrate"):
            planned = RETUNE if kind == "retune" else CALIBRATION
            choice = choose_recovery(settings_, kind=kind, planned=planned, budget=budget,
                                     expected_s=planned.beam_s(PHASES, RATE) * size_draw,
                                     peak=(1e3, 5e2) if used > 0.5 else None)
            assert choice.beam_s <= choice.available_s + 1e-9
            assert choice.available_s <= budget.left_s + 1e-9
            if choice.size is not None:
                # The stage takes anything up to its largest size.
                beam = used * choice.size.beam_s(PHASES, RATE)
                spent += beam
                clock += beam
            else:
                assert choice.action in ("correct", "hold") and choice.limited
        else:
            clock += wait * 3600.0
        if night is not None and clock > night:
            break
        after = BeamBudget.of(settings_, elapsed_s=clock,
                              remaining_s=None if night is None else max(night - clock, 0.0),
                              spent_s=spent)
        assert spent <= after.ceiling_s + 1e-6
    if night is not None:
        assert spent <= fraction * night + 1e-6


@settings(max_examples=200, deadline=None)
@given(left=st.floats(0.0, 3000.0), fraction=st.floats(0.01, 0.2),
       spent=st.floats(0.0, 2000.0), elapsed=st.floats(0.0, 40_000.0),
       recoveries=st.integers(0, 10), cost=st.floats(0.0, 3000.0))
def test_the_checks_share_never_exceeds_what_is_left(left, fraction, spent, elapsed,
                                                     recoveries, cost):
    """The checks' share, over the rest of the night, never takes more than what is left of
    the ceiling, and never more than half the budget fraction."""
    budget = BeamBudget(fraction, elapsed, left, spent)
    out = checks_share(_settings(budget_fraction=fraction), budget, recovery_beam_s=cost,
                       recoveries=recoveries)
    assert 0.0 <= out["share"] <= 0.5 * fraction + 1e-12
    assert out["share"] * max(budget.ahead_s, 60.0) <= budget.left_s + 1e-6


def test_an_open_night_counts_an_hour_ahead():
    """Without an end, the ceiling is the fraction of the rig time so far plus the horizon."""
    budget = BeamBudget(0.05, 7200.0, None, 100.0)
    assert budget.ceiling_s == pytest.approx(0.05 * (7200.0 + OPEN_NIGHT_HORIZON_S))
    assert budget.left_s == pytest.approx(budget.ceiling_s - 100.0)
    assert budget.affords(budget.left_s) and not budget.affords(budget.left_s + 1.0)


def test_the_recovery_gets_cheaper_as_the_budget_runs_out():
    """With plenty left, the planned retune; then a smaller retune that fits what is left after
    the checks' reserve; then a correction to the checks' estimate of the peak; then holding
    on. Each cheaper choice says it was limited by the budget, with its numbers."""
    settings_ = _settings()
    night = 8 * 3600.0
    expected = 360.0

    def choose(spent: float, peak=(2.5e3, 600.0)):
        budget = BeamBudget.of(settings_, elapsed_s=3600.0, remaining_s=night - 3600.0,
                               spent_s=spent)
        return choose_recovery(settings_, kind="retune", planned=RETUNE, budget=budget,
                               expected_s=expected, peak=peak)

    full = choose(0.0)
    assert full.action == "stage" and not full.limited
    assert full.size.check_shots_per_phase == RETUNE.check_shots_per_phase
    assert full.beam_s <= full.available_s
    ceiling = 0.05 * night
    reserve = checks_reserve_s(settings_, BeamBudget(0.05, 3600.0, night - 3600.0, 0.0))
    smaller = choose(ceiling - reserve - 200.0)
    assert smaller.action == "smaller" and smaller.limited
    assert smaller.beam_s <= 200.0 + 1e-6
    assert smaller.size.verification_shots_per_phase < RETUNE.verification_shots_per_phase
    assert "smaller retune" in smaller.reason and "min" in smaller.reason
    correct = choose(ceiling - reserve - 5.0)
    assert correct.action == "correct" and correct.target_hz == pytest.approx(2.5e3)
    assert correct.beam_s == 0.0 and "+2.50 +- 0.60 kHz" in correct.reason
    assert choose(ceiling - reserve - 5.0, peak=None).action == "hold"


def test_the_unheld_time_is_counted_from_the_compromise_to_the_next_good_check():
    """Stretches begin at a compromise and end at the next check that finds the condition held;
    one still open counts up to the clock asked."""
    unheld = Unheld().begin(100.0).begin(150.0).end(400.0).begin(1000.0)
    assert unheld.total_s == pytest.approx(300.0) and unheld.stretches == 2
    assert unheld.at(1600.0) == pytest.approx(900.0)
    assert Unheld.from_dict(unheld.to_dict()) == unheld


# --------------------------------------------------------------------------------------------
# Checks sized to the signal
# --------------------------------------------------------------------------------------------


def _fit_fringes(counts: np.ndarray, n: int, phases: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares fringe ``a + b cos + c sin`` of binomial fractions: (phase, contrast)."""
    design = np.column_stack([np.ones_like(phases), np.cos(phases), np.sin(phases)])
    coef, *_ = np.linalg.lstsq(design, (counts / n).T, rcond=None)
    return np.arctan2(-coef[2], coef[1]), 2.0 * np.hypot(coef[1], coef[2])


@pytest.mark.parametrize(("contrast", "atoms"), [(0.8, 40), (0.5, 40), (0.8, 8)])
def test_the_fringe_variances_match_seeded_binomial_draws(contrast, atoms):
    """The signal model's Var chi = (2 - C^2 / 2) / (N C^2) and Var C = (2 - 3 C^2 / 2) / N of a
    fringe of N detected atoms over six phases agree with the scatter of least-squares fits to
    seeded binomial counts (scipy.stats.binom) within 8 % (8,000 fringes), 35 % at 8 atoms per
    phase (where the delta method is coarse)."""
    phases = np.linspace(0.0, 2.0 * np.pi, PHASES, endpoint=False)
    p = 0.5 + 0.5 * contrast * np.cos(phases + 0.3)
    counts = stats.binom.rvs(atoms, p, size=(8000, PHASES), random_state=np.random.default_rng(5))
    chi, measured = _fit_fringes(counts, atoms, phases)
    n_total = atoms * PHASES
    model_phase = (2.0 - 0.5 * contrast**2) / (n_total * contrast**2)
    model_contrast = (2.0 - 1.5 * contrast**2) / n_total
    spread = np.angle(np.exp(1j * (chi - np.angle(np.exp(1j * np.median(chi))))))
    assert np.var(spread) == pytest.approx(model_phase, rel=0.08 if atoms > 10 else 0.35)
    assert np.var(measured) == pytest.approx(model_contrast, rel=0.08 if atoms > 10 else 0.35)


def test_the_phase_shift_variance_per_shot_is_both_fields_at_half_the_shots():
    """The phase shift is the difference of two fringes, each measured on half of a check's
    shots: its variance from seeded draws of both fields (scipy.stats.binom, atoms per shot
    Poisson-thinned into a fixed count) matches phase_variance_shots / shots within 10 %."""
    signal = SignalModel(0.2, 0.2, 0.8, 0.6, 1.0, 1)
    shots = 2 * PHASES * 300
    atoms = int(round(0.2 * 300))  # per field and phase
    phases = np.linspace(0.0, 2.0 * np.pi, PHASES, endpoint=False)
    rng = np.random.default_rng(11)
    fits = []
    for contrast, offset in ((0.8, 0.0), (0.6, math.pi)):
        p = 0.5 + 0.5 * contrast * np.cos(phases + offset)
        counts = stats.binom.rvs(atoms, p, size=(6000, PHASES), random_state=rng)
        fits.append(_fit_fringes(counts, atoms, phases)[0])
    shift = np.angle(np.exp(1j * (fits[1] - fits[0] - math.pi)))
    assert np.var(shift) == pytest.approx(signal.phase_variance_shots / shots, rel=0.10)


def test_a_check_of_the_readable_size_is_read_with_the_stated_room():
    """At the least readable size, the measured one-photon contrast falls below the lock's
    ratio of the empty one in about 0.5 % of seeded checks (one-sided z = 2.576,
    scipy.stats.norm.sf), far from the half of checks a size of a tenth loses."""
    signal = SignalModel(0.1, 0.1, 0.8, 0.45, 1.0, 1)
    ratio = LockSettings().min_contrast_ratio
    shots = signal.usable_shots(ratio=ratio, phase_margin_rad=10.0)
    assert shots is not None
    rng = np.random.default_rng(3)
    phases = np.linspace(0.0, 2.0 * np.pi, PHASES, endpoint=False)

    def lost(total_shots: int) -> float:
        atoms = max(int(round(0.1 * total_shots / 2 / PHASES)), 1)
        measured = []
        for contrast in (0.8, 0.45):
            p = 0.5 + 0.5 * contrast * np.cos(phases)
            counts = stats.binom.rvs(atoms, p, size=(20000, PHASES), random_state=rng)
            measured.append(_fit_fringes(counts, atoms, phases)[1])
        return float(np.mean(measured[1] < ratio * measured[0]))

    assert lost(shots) == pytest.approx(stats.norm.sf(2.576), abs=0.006)
    assert lost(shots // 10) > 0.05


def test_a_poor_detector_gets_larger_checks_that_still_tell_a_step_from_noise():
    """A detector with a fifth of the atoms per shot: the plan's checks grow (not merely keep
    their size at more noise), the design shift stays at least one standard deviation of the
    innovation, the planned time to confirm a 15 kHz step is stated, and the step's delay at
    the plan's test is Siegmund's run length of a CUSUM, checked against seeded normal data
    (scipy.stats.norm)."""
    settings_ = _settings()
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0)
    measured = NoiseModel(18000 * 0.082**2, 18000 * 0.03**2, 6)
    common = dict(noise=measured, prior=_prior(), lock=lock, reference_inversion=0.72,
                  reference_stderr=0.02, check_share=0.025)
    good = plan_checks(settings_, signal=_signal(0.11), **common)
    poor = plan_checks(settings_, signal=_signal(0.022), **common)
    assert poor.shots_per_phase > good.shots_per_phase
    assert poor.inputs["design_snr"] >= 1.0 and good.inputs["design_snr"] >= 1.0
    assert "15 kHz step is confirmed" in poor.reason and math.isfinite(poor.step_delay_s)
    k, h = poor.test.reference, poor.test.threshold
    step = 15e3 / poor.inputs["innovation_sd_hz"]
    rng = np.random.default_rng(17)
    z = stats.norm.rvs(loc=step, size=(4000, 200), random_state=rng)
    statistic = np.zeros(4000)
    lengths = np.full(4000, 200)
    for n in range(200):
        statistic = np.maximum(0.0, statistic + z[:, n] - k)
        hit = (statistic > h) & (lengths == 200)
        lengths[hit] = n + 1
    assert lengths.mean() == pytest.approx(max(cusum_arl(step, k, h), 1.0), rel=0.25, abs=0.6)


def test_the_signal_model_is_pooled_from_the_noise_rows():
    """Detected atoms per shot are pooled over all rows (each field half of the shots), the
    dispersion is the median of the fits' reduced chi-squares (at least 1), and rows of the
    older three-number form are skipped."""
    estimate = {"phase_shift_stderr": 0.1, "inversion_stderr": 0.03, "detected_empty": 100,
                "detected_one_photon": 120, "contrast_empty": 0.8, "contrast_one_photon": 0.6,
                "chi2_empty": 3.0, "chi2_one_photon": 5.0, "dof_empty": 3, "dof_one_photon": 3}
    rows = [noise_row(estimate, 2000), noise_row(estimate, 2000), [0.1, 0.03, 2000]]
    signal = SignalModel.from_rows(rows)
    assert signal.measurements == 2
    assert signal.detected_per_shot_empty == pytest.approx(200 / 2000)
    assert signal.detected_per_shot_one_photon == pytest.approx(240 / 2000)
    assert signal.dispersion == pytest.approx(16.0 / 12.0)
    assert SignalModel.from_rows([[0.1, 0.03, 2000]]) is None


def test_one_odd_fit_does_not_set_the_dispersion():
    """A stage's long fit whose fringe moved while it was measured (reduced chi-square 9) among
    fits of binomial scatter (about 1) leaves the dispersion near 1, and with it the predicted
    phase variance per shot near the count-limited one: the median, robust to one odd fringe
    like the noise model's (a pooled ratio made it 3.9 on a mismatch night whose checks'
    innovations had a variance of 1.1)."""
    def estimate(chi2: float) -> dict[str, float]:
        return {"phase_shift_stderr": 0.09, "inversion_stderr": 0.03, "detected_empty": 1000,
                "detected_one_photon": 1000, "contrast_empty": 0.85, "contrast_one_photon": 0.55,
                "chi2_empty": chi2 / 2, "chi2_one_photon": chi2 / 2, "dof_empty": 3,
                "dof_one_photon": 3}
    rows = [noise_row(estimate(x), 18_000) for x in (5.1, 52.9, 6.4)]
    signal = SignalModel.from_rows(rows)
    assert signal.dispersion == pytest.approx(6.4 / 6.0)
    bare = SignalModel.from_rows([noise_row(estimate(6.0), 18_000)])
    assert signal.phase_variance_shots == pytest.approx(bare.phase_variance_shots, rel=0.07)


@pytest.mark.parametrize("interval_s", [30.0, 120.0, 600.0, 1800.0])
def test_the_room_to_read_a_check_keeps_two_unreadable_checks_as_rare_as_a_chart_alarm(
        interval_s):
    """Two unreadable checks in a row raise the alarm: the room ``z`` of a check every
    ``interval_s`` makes that pair (probability ``norm.sf(z)^2``, scipy.stats) no more frequent
    than each chart's false alarms, one in three times the designed interval's checks, within
    the one-sided 5 % and 0.5 % bounds."""
    s = _settings()
    z = readable_z(s, interval_s)
    checks = s.false_alarm_interval_s / interval_s
    assert stats.norm.isf(0.05) - 1e-3 <= z <= stats.norm.isf(0.005) + 1e-3
    if stats.norm.isf(0.05) < z < stats.norm.isf(0.005):
        assert stats.norm.sf(z) ** 2 * 3.0 * checks == pytest.approx(1.0, rel=1e-6)
    assert readable_z(s, interval_s / 2) >= z


def test_after_a_retune_the_checks_keep_half_the_budget_and_a_poor_signal_its_cadence():
    """Right after a retune that left less than the recoveries expected in the rest of the night
    would take, the checks still get half the budget (the numbers say what the recoveries
    lack), and a rig of few detected atoms and a weak one-photon contrast gets checks within
    the configured longest interval whose planned time to confirm a 15 kHz step is under
    10 min (they were 20-35 min apart at a quarter of the budget)."""
    s = _settings()
    budget = BeamBudget(0.05, 8280.0, 20_520.0, 890.0)
    share = checks_share(s, budget, recovery_beam_s=356.0, recoveries=1)
    assert share["reserve_s"] > budget.left_s
    assert share["share"] == pytest.approx(0.025)
    assert share["recoveries_left_s"] == pytest.approx(budget.left_s - 0.025 * 20_520.0)
    prior = _prior()
    lock = DriftLock.start(8280.0, 0.0, 1500.0, 0.0, 0.4, 20.0)
    signal = SignalModel(0.28, 0.28, 0.83, 0.44, 1.0, 13)
    plan = plan_checks(s, noise=NoiseModel(signal.phase_variance_shots, 7.3, 13), prior=prior,
                       lock=lock, reference_inversion=0.61, reference_stderr=0.01,
                       check_share=share["share"], signal=signal)
    assert plan.interval_s <= s.max_interval_s
    assert plan.step_delay_s < 600.0


@pytest.mark.parametrize(("inversion", "stderr", "reference", "reference_sd"), [
    (0.726, 0.040, 0.718, 0.012), (0.62, 0.03, 0.72, 0.01), (0.70, 0.02, 0.72, 0.02),
    (0.65, 0.02, 0.72, 0.02)])
def test_a_failed_retunes_point_is_held_when_not_below_the_reference(inversion, stderr,
                                                                     reference, reference_sd):
    """The test that lets a night hold a retune's point that missed its acceptance bound is the
    one-sided z-test of the difference of two independent Gaussian estimates: its z and p are
    scipy.stats.norm's, and it holds exactly when p is at least the 2.5 % level."""
    test = holds_as_well(inversion, stderr, reference, reference_sd)
    z = (inversion - reference) / math.hypot(stderr, reference_sd)
    assert test["z"] == pytest.approx(z, rel=1e-12)
    assert test["p"] == pytest.approx(stats.norm.cdf(z), rel=1e-9)
    assert test["holds"] is bool(stats.norm.cdf(z) >= 0.025)


def test_the_held_point_test_at_its_worked_boundary():
    """Worked values: a difference of -1.96 combined standard errors is the two-sided 95 % bound
    (common practice), p = 0.025 (scipy.stats.norm.cdf(-1.959964) = 0.0250000); just above it the
    point holds, just below it does not."""
    assert stats.norm.cdf(-1.959964) == pytest.approx(0.025, abs=1e-7)
    spread = math.hypot(0.03, 0.04)  # 0.05
    assert holds_as_well(0.70 - 1.95 * spread, 0.03, 0.70, 0.04)["holds"]
    assert not holds_as_well(0.70 - 1.97 * spread, 0.03, 0.70, 0.04)["holds"]


def test_the_held_point_never_waives_the_inversion_floor():
    """A point as good as the reference but below [acceptance] min_inversion is not held."""
    assert holds_as_well(0.72, 0.04, 0.70, 0.02, min_inversion=0.5)["holds"]
    assert not holds_as_well(0.72, 0.04, 0.70, 0.02, min_inversion=0.99)["holds"]
