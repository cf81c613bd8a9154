"""The inversion and the empty contrast share the empty fringe's noise: their covariance, and the
velocity model that conditions on both jointly.

References: the multivariate delta method (G. Casella and R. L. Berger, *Statistical Inference*,
2nd ed., 2002, section 5.5.4), checked here against a finite-difference gradient
(scipy.optimize.approx_fprime) and against a Monte Carlo of numpy's binomial draws through the
estimator itself (fringe.fit_fringe); Gaussian conditioning in its partitioned-covariance form
(C. M. Bishop, *Pattern Recognition and Machine Learning*, 2006, eq. 2.81-2.82), an independent
route to the precision form that velocity_model uses; coverage judged with scipy.stats.binomtest.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, stats

from autotune.analysis import velocity_model as vm
from autotune.analysis.fringe import (
    FringeData,
    _fit_batch,
    fit_fringe,
    inversion_contrast_covariance,
    shared_fringe_covariance,
)
from autotune.errors import EstimationError, ValueRefused

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


# ------------------------------------------------------------------ the velocity model

X = np.array([0.0, 0.0, -0.04, 0.05, 0.09, -0.08])
SD_C, SD_I = 0.026, 0.026
SHARED = 0.5 * SD_C**2
A_COEF = np.array([0.02, 0.0, 3.0])


def _curve(rng, shared):
    n = len(X)
    cov = np.array([[SD_C**2, SHARED], [SHARED, SD_I**2]])
    noise = rng.normal(size=(n, 2)) @ np.linalg.cholesky(cov).T
    contrasts = 0.855 + noise[:, 0]                   # flat empty contrast
    inversions = 0.73 - 3.0 * X**2 + noise[:, 1]      # r = I + P_e flat: the true slope of I is 0
    absorptions = 0.02 + 3.0 * X**2
    return vm.fit_inversion_curve(
        X, inversions, np.full(n, SD_I**2), absorptions, np.full(n, 1e-8), contrasts,
        np.full(n, SD_C**2), A_COEF, np.eye(3) * 1e-6, 0.73, 500.0, sorted(set(X)),
        inversion_contrast_covs=shared)


def test_zero_covariance_reproduces_the_independent_model():
    """Joint conditioning with no shared noise is the contrast's posterior used as the prior."""
    rng = np.random.default_rng(1)
    independent = _curve(rng, None)
    rng = np.random.default_rng(1)
    joint = _curve(rng, np.full(len(X), 1e-15))
    np.testing.assert_allclose(joint.coef, independent.coef, atol=1e-10)
    np.testing.assert_allclose(joint.cov, independent.cov, atol=1e-10)
    assert joint.widened == independent.widened


def test_joint_posterior_is_partitioned_gaussian_conditioning():
    """velocity_model's precision form equals mu_a + S_ab S_bb^-1 (y - mu_b) (Bishop eq. 2.81-2.82)."""
    rng = np.random.default_rng(7)
    n = len(X)
    design = np.stack([np.ones(n), X, X * X], axis=1)
    c = 0.85 + rng.normal(0, SD_C, n)
    r = 0.75 + rng.normal(0, SD_I, n)
    c_var, r_var = np.full(n, SD_C**2), np.full(n, SD_I**2)
    shared = np.full(n, SHARED)
    k = 0.86
    prior_mean = np.array([0.85, 0.0, 0.0, 0.75, 0.0, 0.0])
    prior_cov = np.diag([1.0, 2.5**2, 0.4**2, 1.0, 0.07**2, 0.36**2])
    mean, cov, _ = vm._joint_posterior(design, c, c_var, r, r_var, shared, k, prior_mean, prior_cov)
    # The joint Gaussian of (theta, y) and its conditional.
    a = np.zeros((2 * n, 6))
    a[:n, :3] = design
    a[n:, 1], a[n:, 2] = k * X, k * X * X
    a[n:, 3:] = design
    noise = np.block([[np.diag(c_var), np.diag(shared)], [np.diag(shared), np.diag(r_var)]])
    s_bb = a @ prior_cov @ a.T + noise
    s_ab = prior_cov @ a.T
    y = np.concatenate([c, r])
    theta_mean = prior_mean + s_ab @ np.linalg.solve(s_bb, y - a @ prior_mean)
    theta_cov = prior_cov - s_ab @ np.linalg.solve(s_bb, s_ab.T)
    to_r = np.array([[0, 0, 0, 1, 0, 0], [0, k, 0, 0, 1, 0], [0, 0, k, 0, 0, 1]], dtype=float)
    np.testing.assert_allclose(mean, to_r @ theta_mean, atol=1e-9)
    np.testing.assert_allclose(cov, to_r @ theta_cov @ to_r.T, atol=1e-12)


def test_the_joint_model_states_the_slope_honestly_where_the_independent_one_does_not():
    """On a rig with a flat contrast and a flat r, fringe pairs whose inversion and contrast share
    half the contrast's variance: over 1000 draws the joint model's slope z-score has sd 1 (within
    0.1) and its 95 % interval covers the true slope at a rate consistent with 95 %
    (scipy.stats.binomtest, p > 0.001); the independent model's z is wider than it states."""
    rng = np.random.default_rng(11)
    z_joint, z_indep = [], []
    for _ in range(1000):
        state = rng.bit_generator.state
        joint = _curve(rng, np.full(len(X), SHARED))
        rng.bit_generator.state = state
        indep = _curve(rng, None)
        z_joint.append(joint.coef[1] / math.sqrt(joint.cov[1, 1]))
        z_indep.append(indep.coef[1] / math.sqrt(indep.cov[1, 1]))
    z_joint, z_indep = np.array(z_joint), np.array(z_indep)
    assert np.std(z_joint) == pytest.approx(1.0, abs=0.1)
    covered = int(np.sum(np.abs(z_joint) < stats.norm.ppf(0.975)))
    assert stats.binomtest(covered, 1000, 0.95).pvalue > 1e-3
    assert np.std(z_indep) > np.std(z_joint) + 0.08


def test_bad_covariances_are_refused():
    rng = np.random.default_rng(2)
    with pytest.raises(ValueRefused, match="inversion-contrast covariance"):
        _curve(rng, np.full(len(X) - 1, SHARED))
    with pytest.raises(ValueRefused, match="inversion-contrast covariance"):
        _curve(rng, np.full(len(X), float("nan")))
