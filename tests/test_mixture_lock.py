"""The phase lock on a poor one-photon source (a field mixing |0> and |1>).

Outside references: the fringe of a mixed field is the photon-number average of the pure
fringes, so its (b, c) and its phase are those of ``sum_n p_n a_g(n)`` (docs/physics.md
sections 3 and 5b, evaluated here directly with numpy); the crossing amplitude ``a_g(1)`` of the
Gaussian mode from qutip's sesolve of the Jaynes-Cummings model (tests/sim/reference.py); the
2 pi rotation's sign flip and the pi rotation's ``a_g(1) = cos(A / 2) = 0`` (the pulse-area result,
docs/physics.md section 2); the simulated rig's noiseless truth for the closed loop.
"""

from __future__ import annotations

import math
import numpy as np
import pytest

from autotune.analysis.guided import LockSettings, PhaseLockSearch
from autotune.analysis.lock_fit import (mixture_measured_phase, mixture_phase_error, mixture_phase_gain,
                                        phase_signal_note, wrap_phase)
from autotune.analysis.search import Dimension, PointResult, SearchSpace

PI = math.pi
SETTINGS = LockSettings(bracket_step_hz=49e3 / 5)


def _mixture_phase_error(p1: float, a_g1: complex) -> tuple[float, float]:
    """Measured phase error (rad, against pi) and contrast ratio of the field p0 |0> + p1 |1>:
    the angle and modulus of p0 * 1 + p1 * a_g(1) (docs/physics.md section 5b), empty fringe a = 1."""
    amplitude = (1.0 - p1) + p1 * a_g1
    return float(wrap_phase(np.angle(amplitude) - PI)), float(abs(amplitude))


@pytest.mark.parametrize("p1", [1.0, 0.9, 0.75, 0.6, 0.58])
def test_mixture_law_inverts_the_photon_number_average(p1):
    """With a_g(1) = -e^{i eps} the mixture's measured phase error is arg(p0 - p1 e^{i eps}) - pi
    (numpy, docs/physics.md section 5b); the law recovers eps from it and back, and near the peak
    the measured phase moves p1 / (2 p1 - 1) times faster than eps (3.6 at p1 = 0.58)."""
    q = (1.0 - p1) / p1
    for eps in np.linspace(-2.5, 2.5, 41):
        measured, _ = _mixture_phase_error(p1, -np.exp(1j * eps))
        assert float(mixture_phase_error(measured, q)) == pytest.approx(eps, abs=1e-12)
        assert float(mixture_measured_phase(eps, q)) == pytest.approx(measured, abs=1e-12)
    h = 1e-6
    slope = (_mixture_phase_error(p1, -np.exp(1j * h))[0] - _mixture_phase_error(p1, -np.exp(-1j * h))[0]) / (2 * h)
    assert slope == pytest.approx(p1 / (2 * p1 - 1), rel=1e-6)
    # The contrast ratio at the peak is 2 p1 - 1 (the empty fringe's is 1).
    assert _mixture_phase_error(p1, -1.0)[1] == pytest.approx(2 * p1 - 1, abs=1e-12)


@pytest.mark.parametrize("p1", [1.0, 0.75, 0.6])
def test_mixture_laws_derivative_is_the_inverse_of_the_photon_number_averages_slope(p1):
    """d eps / d psi (mixture_phase_gain) is one over the central difference of the measured phase
    error arg(p0 - p1 e^{i eps}) - pi in eps (numpy, docs/physics.md section 5b), at the peak and
    off it; 1 - q at the peak."""
    q = (1.0 - p1) / p1
    h = 1e-6
    for eps in (-1.2, 0.0, 0.4, 1.5):
        psi, _ = _mixture_phase_error(p1, -np.exp(1j * eps))
        dpsi = (_mixture_phase_error(p1, -np.exp(1j * (eps + h)))[0]
                - _mixture_phase_error(p1, -np.exp(1j * (eps - h)))[0]) / (2 * h)
        assert mixture_phase_gain(psi, q) == pytest.approx(1.0 / dpsi, rel=1e-6)
    assert mixture_phase_gain(0.0, q) == pytest.approx(1.0 - q, abs=1e-12)


@pytest.mark.parametrize("detuning_hz", [-6e3, 2e3, 5e3])
def test_mixture_law_on_qutip_crossing_amplitudes(detuning_hz):
    """On a_g(1) of the Gaussian mode from qutip's sesolve (detuned, so |a_g(1)| < 1), the field
    p0 |0> + p1 |1> with p1 = 0.6 has the phase of p0 + p1 a_g(1); the law with
    q = p0 / (p1 |a_g(1)|) gives back the one-photon phase error arg(-a_g(1)) exactly."""
    from sim.reference import COUPLING_HZ, WAIST_M, qutip_crossing

    v_2pi = 2 * PI * COUPLING_HZ * WAIST_M / (2 * math.sqrt(PI))  # docs/physics.md section 2
    a_g1, _ = qutip_crossing(v_2pi, detuning_hz, 1)
    p1 = 0.6
    measured, ratio = _mixture_phase_error(p1, a_g1)
    eps = float(wrap_phase(np.angle(-a_g1)))
    assert abs(eps) > 0.05 and ratio < 0.35  # a real test: off the peak, below the fixed gate
    q = (1.0 - p1) / (p1 * abs(a_g1))
    assert float(mixture_phase_error(measured, q)) == pytest.approx(eps, abs=1e-9)
    # The measured error exceeds the true one: the pure photon's law (q = 0) errs on the cautious side.
    assert abs(measured) > abs(eps)


def _point(ratio: float, phase_error: float, phase_sd: float) -> PointResult:
    return PointResult(inversion=0.4, inversion_stderr=0.03, phase_shift=float(np.mod(PI + phase_error, 2 * PI)),
                       phase_shift_stderr=phase_sd, absorption=0.01, absorption_stderr=0.005,
                       contrast_empty=0.6, contrast_empty_stderr=0.02, contrast_one_photon=0.6 * ratio,
                       contrast_one_photon_stderr=0.02, identified=True, clock_s=0.0, shots=12_000)


def test_the_gate_takes_a_poor_sources_phase_and_refuses_a_pi_rotation():
    """p1 = 0.6 at the 2 pi point: ratio 2 p1 - 1 = 0.2 (below min_contrast_ratio 0.35), phase pi;
    with a phase standard error of 0.3 rad it steers the lock, with 1.2 rad (three of them reach
    the wrap) it does not. At a pi rotation a_g(1) = cos(pi / 2) = 0 (pulse-area result): the
    amplitude is p0, phase 0, a phase error of pi, refused for any source; and the night's hold,
    which passes no wrap_sigmas, keeps the fixed contrast gate."""
    error, ratio = _mixture_phase_error(0.6, -1.0)
    assert ratio == pytest.approx(0.2) and abs(error) < 1e-12
    z = SETTINGS.phase_wrap_sigmas
    assert phase_signal_note(_point(ratio, error, 0.3), SETTINGS, PI, wrap_sigmas=z) is None
    refused = phase_signal_note(_point(ratio, error, 1.2), SETTINGS, PI, wrap_sigmas=z)
    assert refused is not None and "standard errors inside the wrap" in refused
    for p1 in (0.6, 0.95):
        error, ratio = _mixture_phase_error(p1, complex(math.cos(PI / 2)))
        assert abs(abs(error) - PI) < 1e-9
        assert phase_signal_note(_point(ratio, error, 0.05), SETTINGS, PI, wrap_sigmas=z) is not None
    # The night's hold calls it without wrap_sigmas: the fixed contrast gate.
    assert phase_signal_note(_point(0.2, 0.0, 0.3), SETTINGS, PI).startswith("one-photon/empty contrast 0.20")


@pytest.mark.parametrize("p1, amplitude", [(0.6, 0.98), (0.7, 0.95), (0.9, 0.99)])
def test_the_empty_fraction_is_read_from_the_contrast_and_the_absorption(p1, amplitude):
    """Points at the peak of a field p0 |0> + p1 |1> with |a_g(1)| = |a| (numpy, docs/physics.md
    section 5b): contrast ratio |p0 - p1 |a||, absorption p1 (1 - |a|^2) / 2. With tiny standard
    errors the lock reads q = p0 / (p1 |a|) back; above min_contrast_ratio (p1 = 0.9) it keeps
    the pure photon's law, q = 0."""
    box = SearchSpace((Dimension("velocity", 460.0, 560.0), Dimension("detuning", -60e3, 60e3)))
    lock = PhaseLockSearch(box, seed=1, start={"velocity": 503.7, "detuning": 0.0}, settings=SETTINGS)
    ratio = abs((1.0 - p1) - p1 * amplitude)
    absorption = p1 * (1.0 - amplitude**2) / 2.0
    for k in range(3):
        result = PointResult(inversion=0.4, inversion_stderr=0.03, phase_shift=PI, phase_shift_stderr=0.2,
                             absorption=absorption, absorption_stderr=1e-6, contrast_empty=0.6,
                             contrast_empty_stderr=1e-6, contrast_one_photon=0.6 * ratio,
                             contrast_one_photon_stderr=1e-6, identified=True, clock_s=10.0 * k, shots=12_000)
        lock.observe({"velocity": 503.7, "detuning": 100.0 * k}, result, purpose="lock")
    expected = (1.0 - p1) / (p1 * amplitude) if ratio < SETTINGS.min_contrast_ratio else 0.0
    assert lock._mixture_low() == pytest.approx(expected, abs=5e-4)  # the cautious end moves it by ~1e-4


@pytest.mark.parametrize("p1, seed", [(0.6, 61), (0.57, 62)])
def test_closed_loop_locks_on_a_simulated_rig_with_a_poor_source(p1, seed):
    """The demo rig with a one-photon probability of 0.6 or 0.57 (contrast ratio 0.14-0.2 near
    the best, every point below the fixed gate; the velocity steps' phase often too faint to
    steer): the lock and the velocity model are established (no point was usable before: the
    stage ended after 12 points without a lock), the bound is stated and covers the true
    shortfall, and the verified choice is >= 0.97 of the simulator's noiseless best."""
    from test_guided import _calibrate, _sim_rig

    rig = _sim_rig({"field": {"one_photon_probability": p1}}, seed=seed)
    chosen, shots, lock = _calibrate(rig, seed=5, max_points=40)
    state = lock.state(clock_s=rig.clock)
    assert state["in_range"] >= 3 and state["slope_rad_per_hz"] is not None
    problems = [p for p, _ in lock.acceptance_problems(chosen, clock_s=rig.clock)]
    assert not any("detuning lock" in p or "phase lock" in p or "velocity model" in p for p in problems), problems
    truth = rig.truth(chosen)
    ratio = truth["inversion"] / truth["best"]["inversion"]
    assert ratio >= 0.97
    assert 1.0 - ratio <= lock.shortfall(clock_s=rig.clock, point=chosen).upper


# -- the detuning term's two laws averaged (Bayesian model averaging) ----------------------------

def test_law_weights_are_posterior_model_probabilities():
    """Posterior model probabilities P(M_k | y) = B_k P(M_k) / sum_j B_j P(M_j) (Kass and Raftery,
    J. Am. Stat. Assoc. 90, 773 (1995), section 2; Hoeting et al., Statistical Science 14, 382
    (1999), eq. 2). Worked values: a Bayes factor of e at even prior odds gives e / (1 + e) =
    0.7311; 2 ln B = 6 (the edge of Kass and Raftery's 'strong', from memory) gives
    1 / (1 + e^-3) = 0.9526; the same evidences offset by 1000 (one shared constant) give the
    same weights (scipy.special.logsumexp keeps them finite); prior odds 1 : 3 multiply the
    Bayes factor."""
    from scipy.special import logsumexp
    from autotune.analysis.lock_fit import law_weights

    assert law_weights([0.0, 1.0]) == pytest.approx([1.0 / (1.0 + math.e), math.e / (1.0 + math.e)], abs=1e-12)
    assert law_weights([1000.0, 1003.0])[1] == pytest.approx(1.0 / (1.0 + math.exp(-3.0)), abs=1e-12)
    assert law_weights([-1.1, -0.5], [0.25, 0.75])[1] == pytest.approx(
        3.0 * math.exp(0.6) / (1.0 + 3.0 * math.exp(0.6)), abs=1e-12)
    evidence, prior = np.array([-3.2, 0.4, -1.0]), np.array([0.2, 0.5, 0.3])
    expected = np.exp(evidence + np.log(prior) - logsumexp(evidence + np.log(prior)))
    assert law_weights(evidence, prior) == pytest.approx(expected, abs=1e-12)
    # A model of prior probability 0 gets no weight, whatever its evidence.
    assert law_weights([0.0, 50.0], [1.0, 0.0]) == pytest.approx([1.0, 0.0], abs=1e-12)
    for bad in (([math.nan, 0.0], None), ([0.0, 1.0], [0.0, 0.0]), ([0.0, 1.0], [1.0, -0.1]),
                ([0.0, 1.0], [1.0])):
        with pytest.raises(ValueError):
            law_weights(*bad)


@pytest.mark.parametrize("mean, sd, q", [(0.1, 0.2, 0.0), (-0.3, 0.12, 0.0), (0.05, 0.3, 0.45), (0.0, 0.06, 0.47)])
def test_one_laws_loss_bound_is_the_noncentral_chi_square_quantile(mean, sd, q):
    """One law: the bound of 1 - cos(eps / 2) is that of |psi|, psi ~ N(mean, sd^2), whose square
    over sd^2 is noncentral chi-square with one degree of freedom and noncentrality (mean/sd)^2
    (scipy.stats.ncx2), read through the mixture's law (eps = psi - arcsin(q sin psi))."""
    from scipy import stats
    from autotune.analysis.lock_fit import averaged_loss_upper

    psi = sd * math.sqrt(stats.ncx2.ppf(0.95, 1, (mean / sd) ** 2))
    expected = 1.0 - math.cos(0.5 * float(mixture_phase_error(psi, q)))
    assert averaged_loss_upper(0.95, [1.0], [mean], [sd], [q]) == pytest.approx(expected, rel=1e-8)


def test_averaged_loss_bound_is_the_quantile_of_the_weighted_mixture():
    """Two laws (pure photon, q = 0; mixture, q = 0.47) weighted 0.3 : 0.7: the bound x solves
    0.3 F_pure(x) + 0.7 F_mix(x) = 0.95 with each F a difference of scipy.stats.norm CDFs, agrees
    with the 95 % quantile of 400,000 draws of the mixture (numpy), and lies between the two laws'
    own bounds: the weighted mixture, not the bolder law."""
    from scipy import stats
    from autotune.analysis.lock_fit import averaged_loss_upper

    weights, means, sds, qs = [0.3, 0.7], [0.08, 0.05], [0.12, 0.13], [0.0, 0.47]
    x = averaged_loss_upper(0.95, weights, means, sds, qs)
    e = 2.0 * math.acos(1.0 - x)
    cdf = sum(w * (stats.norm.cdf(float(mixture_measured_phase(e, q)), m, s)
                   - stats.norm.cdf(-float(mixture_measured_phase(e, q)), m, s))
              for w, m, s, q in zip(weights, means, sds, qs))
    assert cdf == pytest.approx(0.95, abs=1e-9)
    rng = np.random.default_rng(7)
    n = 400_000
    pick = rng.random(n) < weights[0]
    psi = np.where(pick, rng.normal(means[0], sds[0], n), rng.normal(means[1], sds[1], n))
    loss = 1.0 - np.cos(0.5 * mixture_phase_error(psi, np.where(pick, qs[0], qs[1])))
    assert x == pytest.approx(float(np.quantile(loss, 0.95)), rel=0.01)
    alone = [averaged_loss_upper(0.95, [1.0], [m], [s], [q]) for m, s, q in zip(means, sds, qs)]
    assert min(alone) < x < max(alone)
    # An error of pi is not likely enough: the bound is the whole inversion.
    assert averaged_loss_upper(0.95, [1.0], [0.0], [50.0], [0.0]) == 1.0


def test_weighted_quantile_is_the_inverse_of_the_weighted_empirical_cdf():
    """Against numpy's quantile with weights (method 'inverted_cdf', numpy >= 2.0) and a worked
    example: values 1, 2, 3 with weights 0.5, 0.3, 0.2 have the 50 % quantile 1 and the 80 %
    quantile 2 (the smallest value whose cumulative weight reaches the probability)."""
    from autotune.analysis.lock_fit import weighted_quantile

    assert weighted_quantile([3.0, 1.0, 2.0], [0.2, 0.5, 0.3], 0.5) == 1.0
    assert weighted_quantile([3.0, 1.0, 2.0], [0.2, 0.5, 0.3], 0.8) == 2.0
    assert weighted_quantile([3.0, 1.0, 2.0], [0.2, 0.5, 0.3], 0.81) == 3.0
    if int(np.__version__.split(".")[0]) >= 2:
        rng = np.random.default_rng(3)
        values, weights = rng.normal(size=2001), rng.random(2001)
        for p in (0.05, 0.5, 0.95):
            assert weighted_quantile(values, weights, p) == float(
                np.quantile(values, p, weights=weights, method="inverted_cdf"))


def _poor_lock(ratio: float, ratio_sd: float) -> PhaseLockSearch:
    """A lock at one velocity on a source of contrast ratio ``ratio``: five points across the peak
    whose phase follows a slope of 2e-4 rad/Hz and whose inversions fall as cos(psi / 2)."""
    box = SearchSpace((Dimension("velocity", 460.0, 560.0), Dimension("detuning", -60e3, 60e3)))
    lock = PhaseLockSearch(box, seed=1, start={"velocity": 503.7, "detuning": 0.0}, settings=SETTINGS)
    for k, detuning in enumerate((-1500.0, -700.0, 0.0, 800.0, 1600.0)):
        psi = 2e-4 * detuning
        result = PointResult(inversion=0.45 * math.cos(0.5 * psi), inversion_stderr=0.03,
                             phase_shift=float(np.mod(PI + psi, 2 * PI)), phase_shift_stderr=0.15,
                             absorption=0.02, absorption_stderr=0.004, contrast_empty=0.6,
                             contrast_empty_stderr=1e-6, contrast_one_photon=0.6 * ratio,
                             contrast_one_photon_stderr=0.6 * ratio_sd, identified=True,
                             clock_s=10.0 * k, shots=12_000)
        lock.observe({"velocity": 503.7, "detuning": detuning}, result, purpose="lock")
    return lock


def test_the_detuning_term_averages_the_laws_only_where_the_source_may_be_poor():
    """A contrast ratio of 0.8 (a good source, P(r < 0.35) ~ 0): one law, the pure photon's, the
    term as before. A ratio of 0.33 +- 0.03 per point (the upper 95 % limit above 0.35: the lock
    reads the pure law, but the source is poor with a probability of 0.93): both laws, weights
    from scipy.stats.norm's probability times each law's evidence, and the detuning term's
    bound between the pure law's alone and the mixture's alone."""
    from scipy import stats
    from autotune.analysis.lock_fit import law_weights

    good = _poor_lock(0.8, 0.02)
    assert len(good._phase_laws()) == 1 and good._phase_laws()[0][1] == 0.0

    lock = _poor_lock(0.33, 0.03)
    assert lock._mixture_low() == 0.0  # the gate still reads the pure photon's law
    laws = lock._phase_laws()
    assert len(laws) == 2 and laws[0][1] == 0.0 and laws[1][1] > 0.3
    chance = float(stats.norm.cdf(0.35, 0.33, 0.03 / math.sqrt(5)))
    assert lock._source_estimate()[1] == pytest.approx(chance, abs=1e-9)
    evidences = [lock._compute_phase_star(law[1])[2] for law in laws]
    assert [law[0] for law in laws] == pytest.approx(list(law_weights(evidences, [1 - chance, chance])), abs=1e-9)
    point = {"velocity": 503.7, "detuning": 0.0}
    averaged = lock._shortfall_at(point, 40.0).detuning_upper
    fit = lock._lock_fit(503.7)
    phase, var = fit.phase(0.0, 40.0)
    alone = [1.0 - math.cos(0.5 * float(mixture_phase_error(
        sd * math.sqrt(stats.ncx2.ppf(0.95, 1, ((phase - star) / sd) ** 2)), q)))
        for q, star, sd in ((law[1], law[2], math.sqrt(var + law[3] ** 2)) for law in laws)]
    assert alone[1] < averaged < alone[0]
