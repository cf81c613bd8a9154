"""Tests of autotune.analysis.guided: the phase lock on synthetic error signals and on the simulated rig.

The synthetic rig below is built from the laws the strategy's models rest on, each from outside
the project: the inversion ``cos(eps / 2)`` of an ideal fringe pair with a phase error ``eps``
(from the Ramsey formula of docs/physics.md section 3, checked numerically here), a phase shift that
saturates at +-pi far from the peak as a crossing's does, and an absorption quadratic in the
pulse area, i.e. in 1 / v (the pulse-area result of docs/physics.md section 2). Its noise levels are
those of the simulated demo rig at 1,500 shots per phase (docs/physics.md section 5b, measured).
Statistical checks use scipy.stats.
"""

from __future__ import annotations

import dataclasses
import json
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np
import pytest
from scipy import optimize, stats

from autotune.analysis.fringe import FringeData, estimate_inversion
from autotune.analysis.guided import LockPrior, LockSettings, PhaseLockSearch
from autotune.analysis.search import Dimension, PointResult, SearchSpace, Strategy

PI = math.pi
V0 = 503.7  # nominal 2 pi velocity of the demo's nominal coupling and waist, m/s (docs/physics.md section 6)
BOX = SearchSpace((Dimension("velocity", 460.0, 560.0), Dimension("detuning", -60e3, 60e3)))
START = {"velocity": V0, "detuning": 0.0}
SETTINGS = LockSettings(bracket_step_hz=49e3 / 5)


# --------------------------------------------------------------------------------------------
# A synthetic rig made of the models' laws
# --------------------------------------------------------------------------------------------


@dataclass
class Synthetic:
    """Measured quantities from the physics' laws with Gaussian noise; its clock runs at 150 shots/s."""

    peak_detuning_hz: float
    slope_rad_per_hz: float = 0.03 * PI / 1e3
    phase_at_peak_rad: float = PI
    velocity_star: float = 510.0
    curvature: float = 3.5
    absorption_min: float = 0.015
    scale: float = 0.73
    drift_hz_per_s: float = 0.0
    seed: int = 0
    contrast_ratio: Callable[[float, float], float] | None = None
    absorption_noise: bool = True
    clock: float = 0.0
    rng: np.random.Generator = field(init=False)

    def __post_init__(self) -> None:
        self.rng = np.random.default_rng(self.seed)

    def _error(self, point: Mapping[str, float], clock: float) -> float:
        offset = point["detuning"] - (self.peak_detuning_hz + self.drift_hz_per_s * clock)
        return 2.0 * math.atan(0.5 * self.slope_rad_per_hz * offset)

    def _excess(self, point: Mapping[str, float]) -> float:
        return self.curvature * (self.velocity_star / point["velocity"] - 1.0) ** 2

    def shortfall(self, point: Mapping[str, float]) -> float:
        """True relative shortfall below the best at the present clock."""
        error = self._error(point, self.clock)
        return (1.0 - math.cos(0.5 * error)) + self._excess(point) / self.scale

    def measure(self, point: Mapping[str, float], shots_per_phase: int, phases: int = 6) -> PointResult:
        shots = 2 * phases * shots_per_phase
        duration = shots / 150.0
        middle = self.clock + 0.5 * duration
        self.clock += duration + 0.5
        relative = math.sqrt(1500.0 / shots_per_phase)
        ratio = 0.73 if self.contrast_ratio is None else self.contrast_ratio(point["velocity"], point["detuning"])
        # The phase shift is the angle between two fringes: its variance is the sum of each
        # fringe's angle variance, sigma_fringe^2 / contrast^2 (the delta method), so it grows
        # as (1 + 1 / r^2) with the one-photon/empty ratio r (0.025 pi at the demo's 0.73).
        contrast_factor = math.sqrt((1.0 + 1.0 / ratio**2) / (1.0 + 1.0 / 0.73**2))
        phase_sd, inversion_sd = 0.025 * PI * relative * contrast_factor, 0.03 * relative
        error = self._error(point, middle)
        absorption = self.absorption_min + self._excess(point)
        atoms = 0.11 * phases * shots_per_phase
        absorption_sd = math.sqrt(max(absorption, 1e-3) * (1 - absorption) / atoms) if self.absorption_noise else 1e-6
        return PointResult(
            inversion=self.scale * math.cos(0.5 * error) - (absorption - self.absorption_min)
            + self.rng.normal(0.0, inversion_sd),
            inversion_stderr=inversion_sd,
            phase_shift=float(np.mod(self.phase_at_peak_rad + error + self.rng.normal(0.0, phase_sd), 2 * PI)),
            phase_shift_stderr=phase_sd,
            absorption=float(np.clip(absorption + self.rng.normal(0.0, absorption_sd) * self.absorption_noise, 0, 1)),
            absorption_stderr=absorption_sd,
            contrast_empty=0.3, contrast_empty_stderr=0.01,
            contrast_one_photon=0.3 * ratio, contrast_one_photon_stderr=0.01,
            identified=True, clock_s=middle, shots=shots)


def _run(lock: PhaseLockSearch, rig: Synthetic, max_points: int = 60) -> tuple[bool, list]:
    """Propose, measure, observe until converged (or ``max_points``); returns (converged, proposals)."""
    proposals = []
    for _ in range(max_points):
        proposal = lock.propose(clock_s=rig.clock)
        proposals.append(proposal)
        lock.observe(proposal.point, rig.measure(proposal.point, proposal.shots_per_phase or 1500),
                     purpose=proposal.purpose)
        if lock.converged(clock_s=rig.clock):
            return True, proposals
    return False, proposals


# --------------------------------------------------------------------------------------------
# The physics behind the models
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("error", [0.0, 0.1 * PI, 0.3 * PI, -0.5 * PI])
def test_detuning_term_is_the_ramsey_inversion_loss(error):
    """The verdict's detuning term equals 1 - I(eps)/I(0) of the Ramsey formula P_g = |a - e^{-i phi}|^2 / 4."""
    # docs/physics.md section 3: one photon at a 2 pi rotation with phase error eps has a = -e^{-i eps};
    # the inversion is the largest one-photon minus empty difference over the Ramsey phase.
    phi = np.linspace(0.0, 2 * PI, 200001)

    def inversion(eps: float) -> float:
        one = np.abs(-np.exp(-1j * eps) - np.exp(-1j * phi)) ** 2 / 4
        empty = np.abs(1.0 - np.exp(-1j * phi)) ** 2 / 4
        return float(np.max(one - empty))

    prior = _prior(phase_sd=0.01)
    lock = PhaseLockSearch(BOX, seed=0, start=START, settings=SETTINGS, prior=prior)
    check = Synthetic(peak_detuning_hz=0.0).measure(START, 3000)
    check = PointResult(**{**check.to_dict(), "phase_shift": float(np.mod(PI + error, 2 * PI)),
                           "phase_shift_stderr": 1e-4})
    lock.observe(START, check, purpose="check")
    verdict = lock.verdict()
    assert verdict.shortfall.detuning == pytest.approx(1.0 - inversion(error) / inversion(0.0), abs=1e-8)


# --------------------------------------------------------------------------------------------
# The lock
# --------------------------------------------------------------------------------------------


def test_lock_converges_within_its_stated_uncertainty():
    """Over 40 synthetic rigs the locked detuning's 95% interval covers the true peak at its rate (scipy binomtest)."""
    covered = 0
    for seed in range(40):
        rng = np.random.default_rng(seed)
        rig = Synthetic(peak_detuning_hz=float(rng.uniform(-15e3, 15e3)),
                        slope_rad_per_hz=float(rng.uniform(0.02, 0.04)) * PI / 1e3, seed=seed)
        lock = PhaseLockSearch(BOX, seed=seed, start=START, settings=SETTINGS)
        converged, _ = _run(lock, rig)
        assert converged
        state = lock.state(clock_s=rig.clock)
        error = state["detuning_at_peak_hz"] - rig.peak_detuning_hz
        covered += abs(error) <= 1.96 * state["detuning_at_peak_stderr_hz"]
        # The slope is learned to within its stated uncertainty too (4 sigma: one check per rig).
        assert abs(state["slope_rad_per_hz"] - rig.slope_rad_per_hz) <= 4 * state["slope_stderr_rad_per_hz"] + 1e-6
    # A correct 95% interval: its coverage is not significantly below 0.95 (scipy.stats.binomtest).
    assert stats.binomtest(covered, 40, 0.95, alternative="less").pvalue > 0.01, covered


def test_lock_falls_back_from_far_outside_the_capture_range_and_still_locks():
    """Started where the phase error nears the wrap at pi, the search falls back to the Gaussian process, then locks."""
    rig = Synthetic(peak_detuning_hz=45e3, seed=3)
    # 2 atan(s d / 2) at 45 kHz from the peak: beyond the 0.6 pi capture range.
    assert abs(rig._error(START, 0.0)) > 0.6 * PI
    lock = PhaseLockSearch(BOX, seed=1, start=START, settings=SETTINGS)
    converged, proposals = _run(lock, rig, max_points=40)
    purposes = [p.purpose for p in proposals]
    assert purposes[0] == "lock" and purposes[1] == "search"
    assert "Gaussian-process" in proposals[1].reason
    assert converged and {"lock", "velocity", "relock"} <= set(purposes)
    assert rig.shortfall(lock.recommend(clock_s=rig.clock).point) < 0.02


def test_lock_falls_back_where_the_one_photon_contrast_is_low():
    """Started where the one-photon contrast is too low (|a| small: a ratio of 0.03, whose phase's
    own standard error, 1.5 rad at 1,500 shots per phase, reaches the wrap), the search falls
    back, then locks elsewhere."""
    rig = Synthetic(peak_detuning_hz=5e3, velocity_star=520.0, seed=4,
                    contrast_ratio=lambda v, d: 0.03 if v < 490.0 else 0.73)
    lock = PhaseLockSearch(BOX, seed=2, start={"velocity": 470.0, "detuning": 0.0}, settings=SETTINGS)
    converged, proposals = _run(lock, rig, max_points=80)
    assert proposals[1].purpose == "search" and "contrast" in proposals[1].reason
    assert converged
    # A velocity step that came back without a usable phase signal is not asked for again
    # (it was, 70 times, while the expected gain assumed a usable result there).
    unusable = [p for p in proposals if p.purpose == "velocity" and p.point["velocity"] < 490.0]
    assert len(unusable) <= 2, [p.point for p in unusable]
    assert rig.shortfall(lock.recommend(clock_s=rig.clock).point) < 0.02


def test_phase_at_peak_is_refined_by_the_inversions():
    """Inversions on the cos(eps/2) law (docs/physics.md section 3) pull the phase at the peak from pi to its true value."""
    truth = PI + 0.04 * PI  # two prior widths from the prior's centre
    lock = PhaseLockSearch(BOX, seed=0, start=START, settings=SETTINGS)
    rng = np.random.default_rng(5)
    slope = 0.03 * PI / 1e3
    for k, detuning in enumerate([-12e3, -6e3, 0.0, 6e3, 12e3] * 4):
        error = slope * detuning
        result = PointResult(
            inversion=0.73 * math.cos(0.5 * error) + rng.normal(0.0, 0.005), inversion_stderr=0.005,
            phase_shift=float(np.mod(truth + error + rng.normal(0.0, 0.01), 2 * PI)), phase_shift_stderr=0.01,
            absorption=0.015, absorption_stderr=0.003, contrast_empty=0.3, contrast_empty_stderr=0.01,
            contrast_one_photon=0.22, contrast_one_photon_stderr=0.01, identified=True,
            clock_s=60.0 * k, shots=6000)
        lock.observe({"velocity": V0, "detuning": detuning}, result, purpose="lock")
    state = lock.state()
    prior_sd = SETTINGS.phase_at_peak_prior_rad
    assert state["phase_at_peak_stderr_rad"] < 0.7 * prior_sd
    assert abs(state["phase_at_peak_rad"] - truth) < 3 * state["phase_at_peak_stderr_rad"]
    assert abs(state["phase_at_peak_rad"] - truth) < abs(PI - truth)


# --------------------------------------------------------------------------------------------
# The velocity
# --------------------------------------------------------------------------------------------


def test_velocity_step_finds_the_least_absorption():
    """With the minimum of P_e (quadratic in 1/v, pulse-area result) inside the first bracket, it is found."""
    misses = []
    for seed in range(8):
        rig = Synthetic(peak_detuning_hz=-4e3, velocity_star=V0 * 1.03, seed=seed)
        lock = PhaseLockSearch(BOX, seed=seed, start=START, settings=SETTINGS)
        converged, proposals = _run(lock, rig)
        assert converged and sum(p.purpose == "velocity" for p in proposals) >= 2
        state = lock.state(clock_s=rig.clock)
        v, sd = state["velocity_least_absorption_m_per_s"], state["velocity_least_absorption_stderr_m_per_s"]
        misses.append(abs(v - rig.velocity_star) / sd)
        # The velocity tolerance is broad: the excess absorption at the choice is within the target.
        assert rig._excess(lock.recommend().point) / rig.scale < SETTINGS.target_shortfall
    assert np.median(misses) < 2.0, misses


def test_velocity_step_extends_to_a_minimum_outside_the_first_bracket():
    """With the least absorption 9% above the start velocity (first bracket +-5%), the step extends and brackets it."""
    rig = Synthetic(peak_detuning_hz=3e3, velocity_star=V0 * 1.09, seed=11)
    lock = PhaseLockSearch(BOX, seed=0, start=START, settings=SETTINGS)
    converged, proposals = _run(lock, rig)
    assert converged
    assert any("extending towards higher inversion" in p.reason for p in proposals)
    chosen = lock.recommend().point["velocity"]
    assert abs(chosen / rig.velocity_star - 1.0) < 0.03
    assert lock.state()["velocity_note"] == "inversion optimum bracketed"


def test_velocity_step_stops_at_the_box_edge_and_says_so():
    """With the least absorption beyond the box, the search stops at the box edge and its note says so."""
    rig = Synthetic(peak_detuning_hz=0.0, velocity_star=600.0, curvature=2.0, seed=12)
    lock = PhaseLockSearch(BOX, seed=0, start=START, settings=SETTINGS)
    _run(lock, rig)
    assert "box edge" in lock.state()["velocity_note"]
    assert lock.recommend().point["velocity"] == pytest.approx(BOX.highs[0], abs=1.0)


def _run_until_hopeless(lock: PhaseLockSearch, rig: Synthetic, points: int) -> None:
    """Propose and measure up to ``points`` points, stopping once the lock says it is hopeless."""
    for _ in range(points):
        if lock.hopeless(clock_s=rig.clock) is not None:
            return
        proposal = lock.propose(clock_s=rig.clock)
        lock.observe(proposal.point, rig.measure(proposal.point, proposal.shots_per_phase or 1500),
                     purpose=proposal.purpose)


def test_an_optimum_beyond_the_box_is_not_vouched_for_and_says_what_to_check():
    """The best velocity (600 m/s) beyond the box (460-560): the search stops at the edge with the
    data pointing outward (hopeless), and the acceptance gate names the box in one line."""
    from autotune.run.loop import acceptance_reason

    rig = Synthetic(peak_detuning_hz=0.0, velocity_star=600.0, curvature=2.0, seed=12)
    lock = PhaseLockSearch(BOX, seed=0, start=START, settings=SETTINGS)
    _run_until_hopeless(lock, rig, 40)
    assert lock.hopeless(clock_s=rig.clock) is not None and not lock.converged(clock_s=rig.clock)
    point = lock.recommend(clock_s=rig.clock).point
    problems = lock.acceptance_problems(point, clock_s=rig.clock, max_shortfall=0.02)
    assert any("not bracketed" in problem for problem, _ in problems)
    reason = acceptance_reason(0.7, lock.shortfall(clock_s=rig.clock, point=point), problems)
    assert "\n" not in reason and reason.startswith("not accepted: ")
    assert "[setpoints.velocity] search_min and search_max" in reason


def test_a_verified_optimum_inside_the_box_is_vouched_for():
    """Optimum inside the box: after convergence and a verification there, no acceptance problem."""
    rig = Synthetic(peak_detuning_hz=-4e3, velocity_star=V0 * 1.02, seed=3)
    lock = PhaseLockSearch(BOX, seed=3, start=START, settings=SETTINGS)
    converged, _ = _run(lock, rig)
    assert converged
    chosen = lock.recommend(clock_s=rig.clock).point
    lock.observe(chosen, rig.measure(chosen, 6000), purpose="verify")
    assert lock.acceptance_problems(chosen, max_shortfall=0.02) == []
    bound = lock.shortfall(point=chosen)
    assert math.isfinite(bound.upper) and bound.upper <= 0.02
    # The bound covers the synthetic rig's true shortfall there (its own law, outside the model).
    assert rig.shortfall(chosen) <= bound.upper


# --------------------------------------------------------------------------------------------
# The stopping rule
# --------------------------------------------------------------------------------------------


def _false_stop_study(seeds: range) -> tuple[int, int]:
    """Synthetic calibrations (truth drawn from the priors), one per seed: (false stops, stops).

    A false stop: converged() true while the true shortfall at the recommendation exceeds the
    target.
    """
    false_stops, stops = 0, 0
    for seed in seeds:
        rng = np.random.default_rng(1000 + seed)
        rig = Synthetic(
            peak_detuning_hz=float(rng.uniform(-15e3, 15e3)),
            slope_rad_per_hz=float(rng.uniform(0.02, 0.04)) * PI / 1e3,
            phase_at_peak_rad=float(rng.normal(PI, SETTINGS.phase_at_peak_prior_rad)),
            velocity_star=float(V0 * rng.uniform(0.94, 1.06)), curvature=float(rng.uniform(2.0, 5.0)),
            absorption_min=float(rng.uniform(0.005, 0.03)), scale=float(rng.uniform(0.6, 0.8)),
            drift_hz_per_s=float(rng.normal(0.0, 1.0)), seed=seed)
        lock = PhaseLockSearch(BOX, seed=seed, start=START, settings=SETTINGS)
        converged, _ = _run(lock, rig)
        if converged:
            stops += 1
            false_stops += rig.shortfall(lock.recommend(clock_s=rig.clock).point) > SETTINGS.target_shortfall
    return false_stops, stops


def test_stopping_rule_rarely_stops_falsely_in_forty_calibrations():
    """Over 40 synthetic calibrations the rule's false-stop rate is not significantly above its 5% bound.

    The default suite's sample of the slow 200-calibration study below (its first 40 seeds).
    Bound: 1 - confidence = 5%, one-sided scipy.stats.binomtest at 1%. With 40 stops the test
    fails at 7 or more false stops: it catches a rule that stops falsely a quarter of the time
    with probability 0.90 (0.71 at a fifth; binomial tail, scipy.stats.binom), while a rule at
    the measured 0.9% fails it with probability below 1e-7.
    """
    false_stops, stops = _false_stop_study(range(40))
    # The velocity is chosen on the inversion itself: a few runs need more than 60 points
    # (measured: 190 of 200 stopped within 60, all 40 of these 40, none falsely).
    assert stops >= 36
    assert stats.binomtest(false_stops, stops, 1 - SETTINGS.confidence, alternative="greater").pvalue > 0.01, \
        (false_stops, stops)


@pytest.mark.slow
def test_stopping_rule_false_stop_rate_is_within_its_bound():
    """Over 200 synthetic calibrations (truth drawn from the priors) the rule rarely stops above the 1% target.

    Bound: 1 - confidence = 5%, checked one-sided (the rate must not be significantly above it)
    with scipy.stats.binomtest. Measured: 1 false stop in 200 stops (0.5%) here, and 9 in 999
    (0.9%) over seeds 0-999 (one run did not stop within 30 points); the median true shortfall
    at the stop is 0.13%. The rule is conservative: its bound is on the sum of terms. With 200
    stops the test fails at 19 or more false stops (it catches a rule at 15% with probability
    0.99). Slow (about 5 minutes on a loaded 2-core machine): .ci/run runs it.
    """
    false_stops, stops = _false_stop_study(range(200))
    # The velocity is chosen on the inversion itself (noisier than the absorption alone): a few
    # runs need more than 60 points (measured: 190 of 200 stopped within 60).
    assert stops >= 180
    assert stats.binomtest(false_stops, stops, 1 - SETTINGS.confidence, alternative="greater").pvalue > 0.01, \
        (false_stops, stops)


# --------------------------------------------------------------------------------------------
# Verification and retune
# --------------------------------------------------------------------------------------------


def _prior(phase_sd: float = 0.02 * PI, slope: float = 0.03 * PI / 1e3, absorption_min_stderr: float = 0.002,
           velocity: float = 510.0) -> LockPrior:
    # The synthetic phase 2 atan(s d / 2) = s d - s^3 d^3 / 12 + ... (Taylor series).
    return LockPrior(velocity_m_per_s=velocity, velocity_stderr_m_per_s=5.0, detuning_hz=0.0,
                     slope_rad_per_hz=slope, slope_stderr_rad_per_hz=0.1 * slope,
                     cubic_rad_per_hz3=-slope**3 / 12, cubic_stderr_rad_per_hz3=0.3 * slope**3 / 12,
                     phase_at_peak_rad=PI,
                     phase_at_peak_stderr_rad=phase_sd, absorption_min=0.015,
                     absorption_min_stderr=absorption_min_stderr, absorption_curvature=3.5,
                     absorption_curvature_stderr=1.0, inversion=0.73)


def test_correction_moves_a_verification_off_the_peak_and_leaves_one_on_it():
    """A verification 6 kHz off the peak gets a correction towards it; one at the peak gets none."""
    rig = Synthetic(peak_detuning_hz=2e3, seed=21)
    lock = PhaseLockSearch(BOX, seed=0, start=START, settings=SETTINGS)
    assert _run(lock, rig)[0]
    chosen = lock.recommend(clock_s=rig.clock).point
    off = {**chosen, "detuning": rig.peak_detuning_hz + 6e3}
    lock.observe(off, rig.measure(off, 6000), purpose="verify")
    correction = lock.correction(clock_s=rig.clock)
    assert correction is not None and correction.purpose == "correct" and correction.shots_per_phase is None
    assert abs(correction.point["detuning"] - rig.peak_detuning_hz) < 2e3
    lock.observe(correction.point, rig.measure(correction.point, 6000), purpose="correct")
    assert lock.correction(clock_s=rig.clock) is None


def test_retune_never_judges_a_moved_peak_still_good():
    """After a 15 kHz step, and after a move costing 4% (twice the threshold), no check is judged still good."""
    slope = 0.03 * PI / 1e3
    # A move whose true shortfall is twice still_good_shortfall: 1 - cos(atan(s d / 2)) = 0.04.
    four_percent = 2.0 * math.tan(math.acos(1.0 - 2 * SETTINGS.still_good_shortfall)) / slope
    for move in (15e3, -15e3, four_percent, -four_percent):
        for seed in range(50):
            rig = Synthetic(peak_detuning_hz=-move, velocity_star=510.0, seed=seed)
            lock = PhaseLockSearch(BOX, seed=seed, start={"velocity": 510.0, "detuning": 0.0},
                                   settings=SETTINGS, prior=_prior())
            proposal = lock.propose()
            assert proposal.purpose == "check" and proposal.point == {"velocity": 510.0, "detuning": 0.0}
            lock.observe(proposal.point, rig.measure(proposal.point, 3000), purpose="check")
            verdict = lock.verdict()
            assert verdict.in_range and not verdict.still_good, (move, seed, verdict.reason)
            # The inferred detuning error's interval holds the true one (-move: set-point minus peak).
            assert verdict.detuning_error_low_hz <= move <= verdict.detuning_error_high_hz
            nxt = lock.propose()
            assert nxt.purpose in ("correct", "lock")
            assert abs(nxt.point["detuning"] - rig.peak_detuning_hz) < abs(move)


def test_retune_judges_an_unmoved_peak_still_good_at_the_expected_rate():
    """With the peak unmoved, the still-good rate over 300 checks matches the rate predicted from scipy.stats.ncx2.

    The check's absorption is noiseless here, so the verdict rests on the phase alone: still good
    when the upper 95% bound of 1 - cos(eps/2), eps ~ N(e, sigma^2), is within 2%, i.e. when
    sigma^2 ncx2.ppf(0.95, 1, e^2/sigma^2) <= eps_max^2; e ~ N(0, sigma_check^2). A short check
    (500 shots per phase) makes the rate discriminating (about 0.74; 0.99998 at 3,000).
    """
    phase_sd = 0.02 * PI
    prior = _prior(phase_sd=phase_sd, absorption_min_stderr=0.0)
    check_sd = 0.025 * PI * math.sqrt(1500 / 500)
    sigma = math.hypot(check_sd, phase_sd)
    eps_max = 2.0 * math.acos(1.0 - SETTINGS.still_good_shortfall)
    e_max = optimize.brentq(lambda e: sigma**2 * stats.ncx2.ppf(SETTINGS.confidence, 1, (e / sigma) ** 2)
                            - eps_max**2, 0.0, eps_max)
    expected = 2.0 * stats.norm.cdf(e_max / check_sd) - 1.0
    good = 0
    for seed in range(300):
        rig = Synthetic(peak_detuning_hz=0.0, velocity_star=510.0, seed=seed, absorption_noise=False)
        lock = PhaseLockSearch(BOX, seed=seed, start={"velocity": 510.0, "detuning": 0.0},
                               settings=SETTINGS, prior=prior)
        lock.observe(lock.propose().point, rig.measure({"velocity": 510.0, "detuning": 0.0}, 500), purpose="check")
        good += lock.verdict().still_good
    assert 0.5 < expected < 0.99
    assert stats.binomtest(good, 300, expected).pvalue > 0.01, (good, expected)


def test_lock_prior_round_trips_and_names_bad_keys():
    """to_dict/from_dict round-trip through JSON; a missing, unknown or bad key is named in the error."""
    prior = _prior()
    assert LockPrior.from_dict(json.loads(json.dumps(prior.to_dict()))) == prior
    data = prior.to_dict()
    del data["slope_rad_per_hz"]
    with pytest.raises(ValueError, match="slope_rad_per_hz"):
        LockPrior.from_dict(data)
    with pytest.raises(ValueError, match="colour"):
        LockPrior.from_dict({**prior.to_dict(), "colour": 1.0})
    with pytest.raises(ValueError, match="absorption_min"):
        LockPrior.from_dict({**prior.to_dict(), "absorption_min": 1.5})
    with pytest.raises(ValueError, match="inversion"):
        LockPrior.from_dict({**prior.to_dict(), "inversion": "high"})


def test_settings_and_arguments_are_checked_at_the_boundary():
    """Bad settings, a start outside the box, a foreign space or a bad purpose raise ValueError naming it."""
    with pytest.raises(ValueError, match="target_shortfall"):
        LockSettings(target_shortfall=1.5)
    with pytest.raises(ValueError, match="lock_shots_per_phase"):
        LockSettings(lock_shots_per_phase=0)
    with pytest.raises(ValueError, match="slope_sign"):
        LockSettings(slope_sign=2)
    with pytest.raises(ValueError, match="start"):
        PhaseLockSearch(BOX, seed=0, start={"velocity": 700.0, "detuning": 0.0})
    with pytest.raises(ValueError, match="space"):
        PhaseLockSearch(SearchSpace((Dimension("x", 0.0, 1.0),)), seed=0, start={"x": 0.5})
    lock = PhaseLockSearch(BOX, seed=0, start=START)
    assert isinstance(lock, Strategy)
    with pytest.raises(ValueError, match="purpose"):
        lock.observe(START, Synthetic(0.0).measure(START, 500), purpose="explore")
    with pytest.raises(ValueError, match="result"):
        lock.observe(START, {"inversion": 0.7}, purpose="lock")
    with pytest.raises(RuntimeError, match="LockPrior"):
        lock.verdict()


# --------------------------------------------------------------------------------------------
# Determinism and resume
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("peak_hz", [4e3, 45e3])
def test_rebuilt_search_reobserving_the_results_proposes_and_recommends_the_same(peak_hz):
    """Rebuilt with the same arguments and re-observed in order, the search makes the same next decisions."""
    rig = Synthetic(peak_detuning_hz=peak_hz, seed=8)
    original = PhaseLockSearch(BOX, seed=5, start=START, settings=SETTINGS)
    history = []
    for _ in range(7):
        proposal = original.propose(clock_s=rig.clock)
        result = rig.measure(proposal.point, proposal.shots_per_phase or 1500)
        original.observe(proposal.point, result, purpose=proposal.purpose)
        history.append((proposal.point, result, proposal.purpose))
    rebuilt = PhaseLockSearch(BOX, seed=5, start=START, settings=SETTINGS)
    for point, result, purpose in history:
        rebuilt.observe(point, result, purpose=purpose)
    assert rebuilt.propose(clock_s=rig.clock) == original.propose(clock_s=rig.clock)
    assert rebuilt.recommend(clock_s=rig.clock) == original.recommend(clock_s=rig.clock)
    assert rebuilt.shortfall(clock_s=rig.clock) == original.shortfall(clock_s=rig.clock)
    assert json.dumps(rebuilt.state(clock_s=rig.clock), allow_nan=False) == \
        json.dumps(original.state(clock_s=rig.clock), allow_nan=False)


# --------------------------------------------------------------------------------------------
# A small closed loop on the simulated rig (no sockets)
# --------------------------------------------------------------------------------------------


def _sim_rig(perturbation: Mapping[str, Mapping[str, float]], seed: int):
    from drivers_sim.config import load_sim_config, sim_config_from_dict
    from drivers_sim.rig import SimulatedRig
    from rig_process import REPO

    data = load_sim_config(REPO / "configs" / "sim-rig.toml").to_dict()
    for section, values in perturbation.items():
        data[section].update(values)
    return SimulatedRig(sim_config_from_dict(data), seed=seed)


def _measure(rig, point: Mapping[str, float], shots_per_phase: int, seed: int, phases: int = 6) -> PointResult:
    """Move in allowed steps, acquire both fields interleaved at each Ramsey phase, estimate (as autotune.run.loop)."""
    limits = rig.describe()["setpoints"]
    current = rig.status()["setpoints"]
    steps = max(1, *(math.ceil(abs(point[k] - current[k]) / (0.999 * limits[k]["max_step"])) for k in point))
    for j in range(1, steps + 1):
        rig.apply({k: current[k] + (point[k] - current[k]) * j / steps for k in point})
    ramsey = [2 * PI * j / phases for j in range(phases)]
    counts = {"empty": [], "one_photon": []}
    times = []
    for phase in ramsey:
        for field_state in ("empty", "one_photon"):
            reply = rig.acquire(field_state, phase, shots_per_phase)
            times += [reply["t_start"], reply["t_end"]]
            counts[field_state].append([reply["counts"][x] for x in ("e", "g", "i")])
    data = {f: FringeData.from_counts(ramsey, *np.array(c).T) for f, c in counts.items()}
    estimate = estimate_inversion(data["empty"], data["one_photon"], seed=seed)
    return PointResult.from_estimate(estimate, clock_s=0.5 * (min(times) + max(times)),
                                     shots=2 * phases * shots_per_phase)


def _calibrate(rig, seed: int, max_points: int = 20) -> tuple[dict, int, PhaseLockSearch]:
    """The calibration loop of the module notes: search, verify, at most two corrections."""
    nominal = 2 * PI * 49e3 * 5.8e-3 / (2 * math.sqrt(PI))  # docs/physics.md section 2: Omega_0 w / (2 sqrt(pi))
    lock = PhaseLockSearch(BOX, seed=seed, start={"velocity": nominal, "detuning": 0.0}, settings=SETTINGS)
    shots = 0
    for k in range(max_points):
        proposal = lock.propose(clock_s=rig.clock)
        result = _measure(rig, proposal.point, proposal.shots_per_phase or 1500, seed=k)
        shots += result.shots
        lock.observe(proposal.point, result, purpose=proposal.purpose)
        if lock.converged(clock_s=rig.clock):
            break
    # Recommended for the middle of the verification (72,000 shots at 150 per second).
    chosen = lock.recommend(clock_s=rig.clock + 0.5 * 72_000 / 150.0).point
    result = _measure(rig, chosen, 6000, seed=100)
    lock.observe(chosen, result, purpose="verify")
    shots += result.shots
    for j in range(2):
        correction = lock.correction(clock_s=rig.clock)
        if correction is None:
            break
        chosen = correction.point
        result = _measure(rig, chosen, 6000, seed=101 + j)
        lock.observe(chosen, result, purpose="correct")
        shots += result.shots
    return chosen, shots, lock


def _scenarios(count: int, seed: int) -> list[dict]:
    from autotune.bench import SCENARIO_RANGES

    rng = np.random.default_rng(seed)
    out = []
    for _ in range(count):
        perturbation: dict = {}
        for (section, key), (low, high) in SCENARIO_RANGES.items():
            perturbation.setdefault(section, {})[key] = float(rng.uniform(low, high))
        out.append(perturbation)
    return out


@pytest.mark.parametrize("case", ["demo", 0, 1, 2])
def test_closed_loop_on_the_simulated_rig_calibrates_within_budget(case):
    """On the simulated rig (demo and scenarios drawn over the study's ranges) the verified choice is >= 0.97 of
    the true best (the simulator's noiseless truth) within 288,000 shots: 4x the 72,000-shot verification, issue 18's
    ceiling for any calibration (its medians are the study's, benchmarks/README.md, not one draw's)."""
    perturbation = {} if case == "demo" else _scenarios(3, 20261207)[case]
    rig = _sim_rig(perturbation, seed=40 + (0 if case == "demo" else case + 1))
    chosen, shots, lock = _calibrate(rig, seed=3)
    truth = rig.truth(chosen)
    assert truth["inversion"] / truth["best"]["inversion"] >= 0.97
    assert shots <= 288_000
    json.dumps(lock.state(clock_s=rig.clock), allow_nan=False)


def test_closed_loop_retune_after_a_thermal_step():
    """After a 15 kHz thermal step the retune's check is not still good, and the corrected choice is >= 0.97."""
    rig = _sim_rig(_scenarios(4, 20261207)[3], seed=77)
    chosen, _, lock = _calibrate(rig, seed=4)
    prior = LockPrior.from_dict(json.loads(json.dumps(lock.learned_prior(clock_s=rig.clock).to_dict())))
    rig.thermal_step(15e3)
    box = SearchSpace((Dimension("velocity", chosen["velocity"] - 10, chosen["velocity"] + 10),
                       Dimension("detuning", chosen["detuning"] - 25e3, chosen["detuning"] + 25e3)))
    retune = PhaseLockSearch(box, seed=4, start=chosen, settings=SETTINGS, prior=prior)
    check = retune.propose()
    assert check.purpose == "check"
    retune.observe(check.point, _measure(rig, check.point, 3000, seed=200), purpose="check")
    verdict = retune.verdict(clock_s=rig.clock)
    assert verdict.in_range and not verdict.still_good
    shots = 36_000
    for k in range(10):
        proposal = retune.propose(clock_s=rig.clock)
        if proposal.purpose == "correct":
            break
        retune.observe(proposal.point, _measure(rig, proposal.point, proposal.shots_per_phase or 1500, seed=210 + k),
                       purpose=proposal.purpose)
        shots += 12 * (proposal.shots_per_phase or 1500)
        if retune.converged(clock_s=rig.clock):
            proposal = retune.recommend(clock_s=rig.clock)
            break
    final = proposal.point
    truth = rig.truth(final)
    assert truth["inversion"] / truth["best"]["inversion"] >= 0.97
    assert shots <= 72_000


# --------------------------------------------------------------------------------------------
# A retune carries the calibration's velocity term
# --------------------------------------------------------------------------------------------


def _check_at_the_peak(lock: PhaseLockSearch, prior: LockPrior) -> None:
    """A check at the last good set-points that finds them exactly at the peak: phase pi and
    the stored least absorption, both with negligible errors (the retune's own terms vanish)."""
    check = PointResult(inversion=0.73, inversion_stderr=1e-4, phase_shift=PI, phase_shift_stderr=1e-5,
                        absorption=prior.absorption_min, absorption_stderr=1e-6, contrast_empty=0.3,
                        contrast_empty_stderr=0.01, contrast_one_photon=0.22, contrast_one_photon_stderr=0.01,
                        identified=True, clock_s=0.0, shots=36_000)
    lock.observe(START, check, purpose="check")


def test_retune_bound_carries_the_calibrations_velocity_term():
    """The stored velocity term (estimate e, bound u at 95 %) enters the retune's bound: with a check
    exactly at the peak the verdict's bound is u, the 95 % quantile of e + (u - e) |z| / z_q
    (scipy.stats.halfnorm: z_q = halfnorm.ppf(0.95)); a store without the keys adds nothing."""
    e, u = 0.002, 0.012
    base = dataclasses.replace(_prior(phase_sd=1e-5, absorption_min_stderr=1e-6),
                               absorption_curvature_stderr=0.0)
    carried = dataclasses.replace(base, velocity_shortfall=e, velocity_shortfall_upper=u)
    verdicts = {}
    for name, prior in (("without", base), ("with", carried)):
        lock = PhaseLockSearch(BOX, seed=0, start=START, settings=SETTINGS, prior=prior)
        _check_at_the_peak(lock, prior)
        verdicts[name] = lock.verdict()
    assert verdicts["without"].shortfall.upper < 1e-3
    # The half-normal's quantile: 4000 seeded draws give it to a few percent.
    assert stats.halfnorm.ppf(0.95) == pytest.approx(1.959964, abs=1e-6)
    assert verdicts["with"].shortfall.upper == pytest.approx(u, rel=0.05, abs=1e-3)
    assert verdicts["with"].shortfall.estimate >= e
    # The numbers survive the store (JSON) and an older store without the keys reads as zeros.
    data = json.loads(json.dumps(carried.to_dict()))
    assert LockPrior.from_dict(data) == carried
    old = {k: v for k, v in data.items() if not k.startswith("velocity_shortfall")}
    assert LockPrior.from_dict(old).velocity_shortfall_upper == 0.0
    with pytest.raises(ValueError, match="velocity_shortfall_upper"):
        LockPrior.from_dict({**data, "velocity_shortfall_upper": e / 2})


def test_calibration_stores_its_velocity_term_and_a_retune_passes_it_on():
    """A calibration's learned prior holds its own velocity term at the chosen velocity; a retune
    from that prior keeps it (its points cannot lower it) and still stops on what they can."""
    rig = Synthetic(peak_detuning_hz=-4e3, velocity_star=V0 * 1.03, seed=3)
    lock = PhaseLockSearch(BOX, seed=3, start=START, settings=SETTINGS)
    assert _run(lock, rig)[0]
    prior = lock.learned_prior(clock_s=rig.clock)
    short = lock.shortfall(clock_s=rig.clock, point=lock.recommend(clock_s=rig.clock).point)
    assert prior.velocity_shortfall == pytest.approx(max(short.velocity, 0.0))
    assert prior.velocity_shortfall_upper == pytest.approx(short.velocity_upper)
    assert 0.0 < prior.velocity_shortfall_upper < SETTINGS.target_shortfall
    start = lock.recommend(clock_s=rig.clock).point
    retune = PhaseLockSearch(BOX, seed=3, start=start, settings=SETTINGS, prior=prior)
    retune.observe(start, rig.measure(start, 3000), purpose="check")
    assert retune.learned_prior(clock_s=rig.clock) is None or \
        retune.learned_prior(clock_s=rig.clock).velocity_shortfall_upper == prior.velocity_shortfall_upper
    verdict = retune.verdict(clock_s=rig.clock)
    assert verdict.shortfall.velocity_upper >= prior.velocity_shortfall_upper * 0.95


# --------------------------------------------------------------------------------------------
# When more points cannot help
# --------------------------------------------------------------------------------------------


def test_no_third_usable_velocity_is_hopeless_not_forty_lock_points():
    """Where the one-photon contrast is usable only within +-10 m/s of the start (a ratio of
    0.03 elsewhere, whose phase is noise: docs/physics.md section 5b, the lock needs the
    one-photon fringe), the velocity stage
    ends without a model; the search then says so (hopeless) instead of spending its budget on
    lock points whose expected gains are all infinite."""
    rig = Synthetic(peak_detuning_hz=2e3, velocity_star=V0, seed=7,
                    contrast_ratio=lambda v, d: 0.73 if abs(v - V0) < 10.0 else 0.03)
    lock = PhaseLockSearch(BOX, seed=7, start=START, settings=SETTINGS)
    _run_until_hopeless(lock, rig, 20)
    reason = lock.hopeless(clock_s=rig.clock)
    assert reason is not None and "velocity model cannot be established" in reason
    assert lock.n_told <= 8
    assert lock.acceptance_problems(lock.recommend(clock_s=rig.clock).point, clock_s=rig.clock)


def test_a_poor_one_photon_source_ends_the_lock_after_twice_the_fallback_design():
    """A source prepared with a probability near 0.5 mixes the inverted one-photon fringe with
    the empty one: the one-photon contrast is about ``2 p1 - 1`` of the empty one (0.03 for p1 =
    0.515) wherever the rotation is near 2 pi (docs/physics.md section 3's fringe of a mixture,
    a weighted sum of the two fringes), and the phase's own standard error (1.5 rad at 1,500
    shots per phase) reaches the wrap. No point steers the lock; after twice the fallback's
    first design (12 points) the search says so in one line naming the source, instead of
    spending its 40 points."""
    rig = Synthetic(peak_detuning_hz=-18e3, seed=3, contrast_ratio=lambda v, d: 0.03)
    lock = PhaseLockSearch(BOX, seed=3, start=START, settings=SETTINGS)
    _run_until_hopeless(lock, rig, 40)
    reason = lock.hopeless(clock_s=rig.clock)
    assert lock.n_told == 2 * SETTINGS.fallback_initial_points
    assert reason.startswith("the detuning lock is not established after 12 points")
    assert "one-photon contrast was below 0.35" in reason and "preparation probability" in reason
    assert "\n" not in reason


def test_a_rig_whose_best_inversion_is_below_the_acceptance_threshold_is_hopeless():
    """The inversion curve's best within its trusted range is an upper bound on what any point
    in the box reaches: when its upper bound (97.5 %, the two-sided level of the 95 %
    confidence) is below [acceptance] min_inversion, more points cannot make the stage
    acceptable, and the search says so; with a threshold below the best it does not."""
    rig = Synthetic(peak_detuning_hz=2e3, velocity_star=V0, seed=4, scale=0.42)
    lock = PhaseLockSearch(BOX, seed=4, start=START, settings=SETTINGS)
    for _ in range(20):
        if lock.best_inversion() is not None:
            break
        p = lock.propose(clock_s=rig.clock)
        lock.observe(p.point, rig.measure(p.point, p.shots_per_phase or 1500), purpose=p.purpose)
    value, upper = lock.best_inversion()
    # The synthetic rig's best is its scale minus its least absorption (0.42 - 0.015).
    assert value == pytest.approx(0.42 - 0.015, abs=0.05) and upper >= value
    reason = lock.hopeless(clock_s=rig.clock, min_inversion=0.5)
    assert reason is not None and "below [acceptance] min_inversion 0.500" in reason
    assert lock.hopeless(clock_s=rig.clock, min_inversion=0.3) is None or \
        "min_inversion" not in lock.hopeless(clock_s=rig.clock, min_inversion=0.3)


def test_a_bound_within_the_bar_stops_when_the_target_is_out_of_reach_of_the_budget():
    """Mechanics of the budget rule: a bound between the target (1 %) and the acceptance bar (2 %)
    with no point left is hopeless; with a large budget it is not; above the bar it never is."""
    rig = Synthetic(peak_detuning_hz=-4e3, velocity_star=V0 * 1.03, seed=5)
    lock = PhaseLockSearch(BOX, seed=5, start=START, settings=SETTINGS)
    within = None
    for _ in range(40):
        proposal = lock.propose(clock_s=rig.clock)
        lock.observe(proposal.point, rig.measure(proposal.point, proposal.shots_per_phase or 1500),
                     purpose=proposal.purpose)
        upper = lock.shortfall(clock_s=rig.clock).upper
        plan_done = lock.state(clock_s=rig.clock)["stage"] == "refine"
        if plan_done and SETTINGS.target_shortfall < upper <= SETTINGS.still_good_shortfall:
            within = upper
            break
    if within is None:
        pytest.skip("this draw never had a bound between the target and the bar")
    assert "out of reach" in lock.hopeless(clock_s=rig.clock, points_left=0)
    assert lock.hopeless(clock_s=rig.clock, points_left=10**6) is None
    assert lock.hopeless(clock_s=rig.clock, points_left=0, acceptance_bar=0.5 * within) is None
