"""The inversion and the empty contrast share the empty fringe's noise: their covariance.

References: the multivariate delta method (G. Casella and R. L. Berger, *Statistical Inference*,
2nd ed., 2002, section 5.5.4), checked here against a finite-difference gradient
(scipy.optimize.approx_fprime) and against a Monte Carlo of numpy's binomial draws through the
estimator itself (fringe.fit_fringe and its batched form).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize

from autotune.analysis.fringe import (
    FringeData,
    _fit_batch,
    fit_fringe,
    inversion_contrast_covariance,
    shared_fringe_covariance,
)
from autotune.errors import EstimationError

PHASES = np.linspace(0.0, 2.0 * math.pi, 6, endpoint=False)   # the lock's six even phases
ATOMS = 330                                                    # detected atoms per phase


def _p_g(a: float, contrast: float, phase: float) -> np.ndarray:
    return a + 0.5 * contrast * np.cos(PHASES - phase)


def _fit(g: np.ndarray):
    n = np.full(len(PHASES), ATOMS)
    return fit_fringe(FringeData.from_counts(PHASES, n - g, g, np.zeros(len(PHASES), dtype=int)))


def _inversion(t0: np.ndarray, t1: np.ndarray) -> float:
    d = t1 - t0
    return float(d[0] + math.hypot(d[1], d[2]))


def _contrast(t0: np.ndarray) -> float:
    return float(2.0 * math.hypot(t0[1], t0[2]))


@pytest.mark.parametrize("c0, c1, shift", [(0.85, 0.62, math.pi), (0.85, 0.62, 2.6), (0.5, 0.4, math.pi)])
def test_covariance_matches_a_monte_carlo_of_binomial_fringes(c0, c1, shift):
    """Over 20000 fringe pairs drawn with numpy's binomial and fitted by the estimator (the
    bootstrap's batched form of fit_fringe, checked equal to it on the first draws), the sample
    covariance of (inversion, empty contrast) agrees with the delta method at the truth and with
    the summary formula within 8 % (the sample covariance's own sd is about 2 % here)."""
    rng = np.random.default_rng(20261205)
    p0, p1 = _p_g(0.5, c0, 0.3), _p_g(0.45, c1, 0.3 + shift)
    detected = np.full(len(PHASES), ATOMS)
    g0 = rng.binomial(ATOMS, p0, size=(20000, len(PHASES)))
    g1 = rng.binomial(ATOMS, p1, size=(20000, len(PHASES)))
    theta0 = _fit_batch(PHASES, g0, detected)
    theta1 = _fit_batch(PHASES, g1, detected)
    for j in range(3):
        np.testing.assert_allclose(theta0[j], _fit(g0[j]).coefficients, atol=1e-12)
    delta = theta1 - theta0
    inversions = delta[:, 0] + np.hypot(delta[:, 1], delta[:, 2])
    contrasts = 2.0 * np.hypot(theta0[:, 1], theta0[:, 2])
    sample = np.cov(inversions, contrasts)
    fit0 = _fit(np.round(ATOMS * p0).astype(int))
    fit1 = _fit(np.round(ATOMS * p1).astype(int))
    assert inversion_contrast_covariance(fit0, fit1) == pytest.approx(sample[0, 1], rel=0.08)
    summary = shared_fringe_covariance(c0, math.sqrt(sample[1, 1]), c1, shift)
    assert summary == pytest.approx(sample[0, 1], rel=0.08)
    # The inverted fringe's worked value: the inversion moves half a unit per unit of contrast.
    if shift == math.pi:
        assert sample[0, 1] / sample[1, 1] == pytest.approx(0.5, abs=0.04)


def test_delta_method_equals_a_finite_difference_gradient_through_the_fit_covariance():
    """grad(I)^T Sigma0 grad(C0) with the gradients from scipy.optimize.approx_fprime."""
    fit0 = _fit(np.round(ATOMS * _p_g(0.52, 0.8, 0.4)).astype(int))
    fit1 = _fit(np.round(ATOMS * _p_g(0.47, 0.55, 0.4 + 2.9)).astype(int))
    t1 = np.asarray(fit1.coefficients, dtype=float)
    t0 = np.asarray(fit0.coefficients, dtype=float)
    grad_i = optimize.approx_fprime(t0, lambda t: _inversion(t, t1), 1e-7)
    grad_c = optimize.approx_fprime(t0, _contrast, 1e-7)
    expected = float(grad_i @ np.asarray(fit0.covariance) @ grad_c)
    assert inversion_contrast_covariance(fit0, fit1) == pytest.approx(expected, rel=1e-4)


def test_summary_formula_limits_and_bad_input():
    """Half the contrast's variance for an inverted fringe; zero covariance where the angle is a
    right angle; a clear error on a non-finite input or a negative stderr."""
    assert shared_fringe_covariance(0.8, 0.02, 0.6, math.pi) == pytest.approx(0.5 * 0.02**2)
    # C0 = C1 cos(psi): the difference of the fringes is at right angles to the empty one.
    assert shared_fringe_covariance(0.3, 0.02, 0.6, math.pi / 3) == pytest.approx(0.0, abs=1e-15)
    assert shared_fringe_covariance(0.6, 0.02, 0.6, 0.0) == 0.0
    with pytest.raises(EstimationError, match="stderr"):
        shared_fringe_covariance(0.8, -0.02, 0.6, math.pi)
    with pytest.raises(EstimationError, match="finite"):
        shared_fringe_covariance(float("nan"), 0.02, 0.6, math.pi)
    same = _fit(np.round(ATOMS * _p_g(0.5, 0.8, 0.0)).astype(int))
    with pytest.raises(EstimationError, match="nonzero"):
        inversion_contrast_covariance(same, same)
