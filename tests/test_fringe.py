"""Tests of autotune.analysis.fringe against scipy.stats, numpy.linalg and synthetic fringes of known truth."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from autotune.errors import EstimationError
from autotune.analysis.fringe import (
    FringeData,
    InversionEstimate,
    estimate_inversion,
    fit_fringe,
    proportion_interval,
)

# Fringes of a demo-like detector: empty field high contrast, one photon inverted.
EMPTY_TRUTH = (0.49, 0.30, 0.05)
ONE_PHOTON_TRUTH = (0.47, -0.25, -0.02)
LOW_SIGNAL_TRUTH = (0.49, 0.28, 0.06)
ABSORPTION_TRUTH = 0.03


def _phases(k: int) -> np.ndarray:
    return np.linspace(0.0, 2.0 * math.pi, k, endpoint=False)


def _draw(rng: np.random.Generator, abc, k: int, mean_atoms: float, p_e: float = ABSORPTION_TRUTH) -> FringeData:
    """Counts at k equally spaced phases, multinomial over (e, g, i), Poisson atom numbers."""
    phi = _phases(k)
    a, b, c = abc
    p_g = a + b * np.cos(phi) + c * np.sin(phi)
    atoms = rng.poisson(mean_atoms, k)
    counts = np.array([rng.multinomial(atoms[j], [p_e, p_g[j], 1.0 - p_e - p_g[j]]) for j in range(k)])
    return FringeData.from_counts(phi, counts[:, 0], counts[:, 1], counts[:, 2])


def _true_inversion(abc0, abc1) -> float:
    """Brute-force max over a dense phase grid of the difference of two fringes."""
    phi = np.linspace(0.0, 2.0 * math.pi, 200_001)
    p0 = abc0[0] + abc0[1] * np.cos(phi) + abc0[2] * np.sin(phi)
    p1 = abc1[0] + abc1[1] * np.cos(phi) + abc1[2] * np.sin(phi)
    return float(np.max(p1 - p0))


# ---------------------------------------------------------------- binomial intervals


def test_worked_values_seven_of_fifty():
    """7 of 50 at 95 % gives the published worked intervals (docs/physics.md section 5, scipy.stats)."""
    low, high = proportion_interval(7, 50, 0.95, "clopper_pearson")
    assert (float(low), float(high)) == pytest.approx((0.058192, 0.267396), abs=5e-7)
    low, high = proportion_interval(7, 50, 0.95, "wilson")
    assert (float(low), float(high)) == pytest.approx((0.069508, 0.261862), abs=5e-7)


@pytest.mark.parametrize("method, scipy_method", [("wilson", "wilson"), ("clopper_pearson", "exact")])
def test_intervals_match_scipy_binomtest(method, scipy_method):
    """Vectorised intervals equal scipy.stats.binomtest(k, n).proportion_ci for many (k, n, level)."""
    # Wilson, JASA 22, 209 (1927); Clopper and Pearson, Biometrika 26, 404 (1934); reference: scipy.stats.
    rng = np.random.default_rng(3)
    n = rng.integers(1, 400, 60)
    k = rng.integers(0, n + 1)
    k[:3] = 0
    k[3:6] = n[3:6]
    for level in (0.68, 0.95, 0.99):
        low, high = proportion_interval(k, n, level, method)
        for j in range(n.size):
            ref = stats.binomtest(int(k[j]), int(n[j])).proportion_ci(confidence_level=level, method=scipy_method)
            assert low[j] == pytest.approx(ref.low, abs=1e-9)
            assert high[j] == pytest.approx(ref.high, abs=1e-9)


def test_interval_of_zero_trials_is_whole_range():
    """No trials give the interval (0, 1) for both methods."""
    for method in ("wilson", "clopper_pearson"):
        low, high = proportion_interval([0, 3], [0, 10], method=method)
        assert (low[0], high[0]) == (0.0, 1.0)
        assert 0.0 < high[1] < 1.0


@pytest.mark.parametrize(
    "args, word",
    [((5, 3), "successes"), ((-1, 3), "successes"), ((1.5, 3), "successes"), ((1, 3, 1.2), "confidence")],
)
def test_interval_bad_input_names_the_problem(args, word):
    """Bad counts or confidence raise EstimationError naming the argument."""
    with pytest.raises(EstimationError, match=word):
        proportion_interval(*args)


def test_interval_unknown_method_is_refused():
    """An unknown method name raises EstimationError naming the method."""
    with pytest.raises(EstimationError, match="method"):
        proportion_interval(1, 3, method="agresti")  # type: ignore[arg-type]


def test_fringe_data_per_phase_intervals_match_scipy():
    """FringeData's per-phase P_g intervals equal scipy's Wilson intervals on g of e+g+i."""
    data = FringeData.from_counts(_phases(4), [1, 0, 2, 0], [7, 0, 30, 5], [42, 9, 18, 0])
    low, high = data.proportion_interval(0.95, "wilson")
    for j, (g, n) in enumerate([(7, 50), (0, 9), (30, 50), (5, 5)]):
        ref = stats.binomtest(g, n).proportion_ci(0.95, method="wilson")
        assert (low[j], high[j]) == pytest.approx((ref.low, ref.high), abs=1e-9)


# ---------------------------------------------------------------- FringeData validation


@pytest.mark.parametrize(
    "phase, e, g, i, word",
    [
        ([0.0, 1.0, 2.0], [1, 2], [1, 2, 3], [1, 2, 3], "e: expected 3"),
        ([0.0, math.nan, 2.0], [1, 2, 3], [1, 2, 3], [1, 2, 3], "ramsey_phase: expected finite"),
        ([0.0, 1.0, 2.0], [1, -2, 3], [1, 2, 3], [1, 2, 3], "e: expected non-negative"),
        ([0.0, 1.0, 2.0], [1, 2, 3], [1, 2.5, 3], [1, 2, 3], "g: expected integer"),
        ([0.0, 2.0 * math.pi, 1.0], [1, 2, 3], [1, 2, 3], [1, 2, 3], "at least 3 distinct"),
        ([[0.0, 1.0, 2.0]], [1, 2, 3], [1, 2, 3], [1, 2, 3], "1-d"),
    ],
)
def test_fringe_data_bad_input_names_the_problem(phase, e, g, i, word):
    """Inconsistent counts raise EstimationError whose message names the field and the problem."""
    with pytest.raises(EstimationError, match=word):
        FringeData.from_counts(phase, e, g, i)


def test_fringe_data_is_read_only():
    """The arrays of a FringeData cannot be modified after the checks."""
    data = FringeData.from_counts(_phases(3), [0, 0, 0], [1, 2, 3], [3, 2, 1])
    with pytest.raises(ValueError):
        data.g[0] = 10


# ---------------------------------------------------------------- fringe fit


def test_fit_matches_independent_weighted_lstsq():
    """Coefficients and covariance equal numpy.linalg.lstsq / pinv on the same weighted system."""
    rng = np.random.default_rng(11)
    data = _draw(rng, EMPTY_TRUTH, 9, 80)
    fit = fit_fringe(data)
    # Independent computation: the reported fit uses binomial weights N / (p(1-p)) with p
    # from an N-weighted first fit, shrunk as (N p + 1)/(N + 2) (see fit_fringe docstring).
    phi = data.ramsey_phase
    n = data.detected.astype(float)
    y = data.g / n
    x = np.column_stack([np.ones_like(phi), np.cos(phi), np.sin(phi)])
    first = np.linalg.lstsq(x * np.sqrt(n)[:, None], y * np.sqrt(n), rcond=None)[0]
    p = (n * np.clip(x @ first, 0, 1) + 1) / (n + 2)
    sw = np.sqrt(n / (p * (1 - p)))
    theta = np.linalg.lstsq(x * sw[:, None], y * sw, rcond=None)[0]
    pinv = np.linalg.pinv(x * sw[:, None])
    assert fit.coefficients == pytest.approx(theta, abs=1e-12)
    assert fit.covariance == pytest.approx(pinv @ pinv.T, rel=1e-9, abs=1e-15)
    assert fit.dof == 6
    assert fit.chi2 == pytest.approx(float(np.sum((sw * (y - x @ theta)) ** 2)), rel=1e-9)


def test_fit_pulls_are_standard_normal_over_seeds():
    """Over 400 seeded synthetic fringes the pulls (fit - truth)/sigma have mean 0 and sd 1."""
    rng = np.random.default_rng(5)
    truth = np.array(EMPTY_TRUTH)
    pulls, mahalanobis = [], []
    for _ in range(400):
        fit = fit_fringe(_draw(rng, EMPTY_TRUTH, 8, 100))
        pulls.append((fit.coefficients - truth) / np.sqrt(np.diag(fit.covariance)))
        d = fit.coefficients - truth
        mahalanobis.append(d @ np.linalg.solve(fit.covariance, d))
    pulls = np.array(pulls)
    # 400 draws: sd of the mean pull is 0.05, of the pull sd about 0.035 (common practice).
    assert np.all(np.abs(pulls.mean(axis=0)) < 0.2)
    assert np.all(np.abs(pulls.std(axis=0) - 1.0) < 0.12)
    # The Mahalanobis distance of a 3-vector is chi2 with 3 dof: mean 3.
    assert np.mean(mahalanobis) == pytest.approx(3.0, abs=0.45)


def test_fit_contrast_and_phase_follow_definitions():
    """contrast = 2 hypot(b, c) and phase = atan2(c, b) is where the fitted fringe peaks."""
    rng = np.random.default_rng(2)
    fit = fit_fringe(_draw(rng, ONE_PHOTON_TRUTH, 12, 500))
    phi = np.linspace(-math.pi, math.pi, 200_001)
    values = fit.evaluate(phi)
    assert fit.contrast == pytest.approx(values.max() - values.min(), abs=1e-9)
    assert fit.phase == pytest.approx(phi[np.argmax(values)], abs=1e-4)


def test_fit_ignores_phases_without_atoms():
    """A phase with no detected atom changes nothing in the fit."""
    rng = np.random.default_rng(8)
    data = _draw(rng, EMPTY_TRUTH, 6, 50)
    extra = FringeData.from_counts(
        np.append(data.ramsey_phase, 0.3), np.append(data.e, 0), np.append(data.g, 0), np.append(data.i, 0)
    )
    assert fit_fringe(extra).coefficients == pytest.approx(fit_fringe(data).coefficients, abs=1e-14)


def test_fit_with_atoms_at_two_phases_is_refused():
    """Atoms at only two distinct phases raise EstimationError naming the count."""
    data = FringeData.from_counts(_phases(4), [0, 0, 0, 0], [5, 3, 0, 0], [5, 7, 0, 0])
    with pytest.raises(EstimationError, match="3 or more distinct"):
        fit_fringe(data)


# ---------------------------------------------------------------- inversion


def test_inversion_formula_equals_dense_grid_maximum():
    """The reported inversion equals a brute-force max over phi of the two fitted fringes."""
    rng = np.random.default_rng(21)
    empty, one = _draw(rng, EMPTY_TRUTH, 8, 60), _draw(rng, ONE_PHOTON_TRUTH, 8, 60)
    est = estimate_inversion(empty, one, resamples=200)
    brute = _true_inversion(fit_fringe(empty).coefficients, fit_fringe(one).coefficients)
    assert est.inversion == pytest.approx(brute, abs=1e-8)


def test_phase_shift_and_contrasts_follow_truth_definitions():
    """With many atoms the phase shift, contrasts and absorption approach the truth block's values."""
    rng = np.random.default_rng(4)
    est = estimate_inversion(_draw(rng, EMPTY_TRUTH, 8, 20_000), _draw(rng, ONE_PHOTON_TRUTH, 8, 20_000), resamples=400)
    expected_shift = (math.atan2(-0.02, -0.25) - math.atan2(0.05, 0.30)) % (2.0 * math.pi)
    assert est.phase_shift == pytest.approx(expected_shift, abs=5 * est.phase_shift_stderr)
    assert est.contrast_empty == pytest.approx(2 * math.hypot(0.30, 0.05), abs=5 * est.contrast_empty_stderr)
    assert est.contrast_one_photon == pytest.approx(2 * math.hypot(0.25, 0.02), abs=5 * est.contrast_one_photon_stderr)
    assert est.absorption_low <= ABSORPTION_TRUTH <= est.absorption_high
    assert 0.0 <= est.phase_shift < 2.0 * math.pi


def test_absorption_interval_is_wilson_on_summed_counts():
    """Absorption is sum e / sum detected with scipy's Wilson interval."""
    rng = np.random.default_rng(6)
    empty, one = _draw(rng, EMPTY_TRUTH, 6, 40), _draw(rng, ONE_PHOTON_TRUTH, 6, 40)
    est = estimate_inversion(empty, one, resamples=200)
    k, n = int(one.e.sum()), int(one.detected.sum())
    ref = stats.binomtest(k, n).proportion_ci(0.95, method="wilson")
    assert est.absorption == pytest.approx(k / n)
    assert (est.absorption_low, est.absorption_high) == pytest.approx((ref.low, ref.high), abs=1e-9)
    assert (est.detected_empty, est.detected_one_photon) == (int(empty.detected.sum()), n)


def _coverage(truth0, truth1, runs: int, k: int, atoms: float, seed: int) -> float:
    rng = np.random.default_rng(seed)
    target = _true_inversion(truth0, truth1)
    hits = 0
    for run in range(runs):
        est = estimate_inversion(_draw(rng, truth0, k, atoms), _draw(rng, truth1, k, atoms), seed=run, resamples=500)
        hits += est.inversion_low <= target <= est.inversion_high
    return hits / runs


def test_interval_coverage_on_known_fringes_fast():
    """At 95 % the interval covers the true inversion in >= 90 % of 150 seeded synthetic runs."""
    # Binomial sd of the coverage over 150 runs at 0.95 is 0.018 (common practice).
    assert _coverage(EMPTY_TRUTH, ONE_PHOTON_TRUTH, 150, 8, 60, seed=100) >= 0.90


def test_interval_coverage_at_low_signal_fast():
    """Where the fringes barely differ (hypot bias regime) coverage stays >= 90 % over 150 runs."""
    assert _coverage(EMPTY_TRUTH, LOW_SIGNAL_TRUTH, 150, 8, 60, seed=200) >= 0.90


@pytest.mark.slow
@pytest.mark.parametrize(
    "truth1, k, atoms",
    [
        (ONE_PHOTON_TRUTH, 8, 60),
        (ONE_PHOTON_TRUTH, 8, 12),
        (ONE_PHOTON_TRUTH, 6, 3),
        (LOW_SIGNAL_TRUTH, 8, 60),
        ((0.49, -0.05, 0.0), 8, 100),
    ],
)
def test_interval_coverage_study(truth1, k, atoms):
    """Over 1000 seeded runs per regime (typical, small, tiny, low signal) coverage is >= 92 %."""
    # 1000 runs: binomial sd 0.007 at 0.95 (common practice).
    assert _coverage(EMPTY_TRUTH, truth1, 1000, k, atoms, seed=300) >= 0.92


def test_zero_counts_give_finite_whole_range():
    """A field with no atom at all gives finite values and the whole physical range."""
    zero = FringeData.from_counts(_phases(5), [0] * 5, [0] * 5, [0] * 5)
    rng = np.random.default_rng(1)
    est = estimate_inversion(zero, _draw(rng, ONE_PHOTON_TRUTH, 5, 30), resamples=200)
    assert not est.identified
    assert (est.inversion_low, est.inversion_high) == (-1.0, 1.0)
    assert all(math.isfinite(v) for v in est.to_dict().values())


def test_missing_phases_give_finite_whole_range():
    """Atoms at only two of the phases (the others missed) give finite values and the whole range."""
    part = FringeData.from_counts(_phases(4), [0, 0, 0, 0], [8, 2, 0, 0], [2, 8, 0, 0])
    rng = np.random.default_rng(1)
    est = estimate_inversion(_draw(rng, EMPTY_TRUTH, 4, 30), part, resamples=200)
    assert (est.inversion_low, est.inversion_high) == (-1.0, 1.0)
    assert all(math.isfinite(v) for v in est.to_dict().values())


def test_tiny_samples_give_finite_wide_intervals():
    """One atom per phase gives finite values and an interval wider than half the range."""
    tiny0 = FringeData.from_counts(_phases(3), [0, 0, 0], [1, 0, 1], [0, 1, 0])
    tiny1 = FringeData.from_counts(_phases(3), [0, 0, 0], [0, 1, 0], [1, 0, 1])
    est = estimate_inversion(tiny0, tiny1, resamples=500)
    values = est.to_dict()
    assert all(math.isfinite(v) for v in values.values())
    assert est.inversion_high - est.inversion_low > 1.0
    assert -1.0 <= est.inversion_low <= est.inversion <= est.inversion_high <= 1.0


def test_an_overshooting_fit_is_brought_into_the_physical_range_inside_its_interval():
    """Three phases 2 pi / 3 apart determine a + b cos phi + c sin phi exactly. Fractions
    (0, 0, 1) give a = 1/3 and an amplitude 2/3, (1, 1, 0) the mirror fringe, so the unclipped
    inversion is (2/3 - 1/3) + 2 (2/3) = 5/3 (section 5's formula, worked by hand): beyond the
    physical 1, since no difference of two probabilities exceeds 1. The estimate is 1, and its
    interval lies in [-1, 1] and holds it (it once reported 5/3 above an interval ending at 1)."""
    phases = _phases(3)
    empty = FringeData.from_counts(phases, [0, 0, 0], [0, 0, 200], [200, 200, 0])
    one = FringeData.from_counts(phases, [0, 0, 0], [200, 200, 0], [0, 0, 200])
    est = estimate_inversion(empty, one, resamples=200)
    assert est.identified
    assert est.inversion == 1.0
    assert -1.0 <= est.inversion_low <= est.inversion <= est.inversion_high <= 1.0


def test_to_dict_is_json_ready_plain_numbers():
    """to_dict returns plain Python numbers that json.dumps accepts with allow_nan=False."""
    rng = np.random.default_rng(9)
    est = estimate_inversion(_draw(rng, EMPTY_TRUTH, 6, 30), _draw(rng, ONE_PHOTON_TRUTH, 6, 30), resamples=200)
    values = est.to_dict()
    assert set(values) == set(InversionEstimate.__dataclass_fields__)
    assert all(type(v) in (float, int, bool) for v in values.values())
    json.dumps(values, allow_nan=False)


def test_estimate_is_deterministic_for_a_seed():
    """The same counts and seed give the same estimate; another seed a different interval."""
    rng = np.random.default_rng(10)
    empty, one = _draw(rng, EMPTY_TRUTH, 6, 30), _draw(rng, ONE_PHOTON_TRUTH, 6, 30)
    first = estimate_inversion(empty, one, seed=4, resamples=300)
    assert estimate_inversion(empty, one, seed=4, resamples=300) == first
    assert estimate_inversion(empty, one, seed=5, resamples=300).inversion_low != first.inversion_low


@pytest.mark.parametrize(
    "kwargs, word", [({"confidence": 1.0}, "confidence"), ({"resamples": 10}, "resamples")]
)
def test_estimate_bad_settings_name_the_problem(kwargs, word):
    """A confidence outside (0, 1) or too few resamples raise EstimationError naming the setting."""
    data = FringeData.from_counts(_phases(3), [0, 0, 0], [1, 2, 3], [3, 2, 1])
    with pytest.raises(EstimationError, match=word):
        estimate_inversion(data, data, **kwargs)


def test_estimate_refuses_raw_arrays():
    """Passing something other than FringeData raises EstimationError naming the field."""
    data = FringeData.from_counts(_phases(3), [0, 0, 0], [1, 2, 3], [3, 2, 1])
    with pytest.raises(EstimationError, match="empty"):
        estimate_inversion({"g": [1, 2, 3]}, data)  # type: ignore[arg-type]
