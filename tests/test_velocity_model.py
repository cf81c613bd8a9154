"""Tests of autotune.analysis.velocity_model: the inversion along velocity with the physics as its prior.

The reference rig here is the product law of docs/physics.md section 5b: an empty-fringe contrast
that rises with velocity as the Ramsey dephasing falls, exp(-(2 pi Delta_R L sigma_v / v^2)^2 / 2)
(the average of a fringe over a Gaussian velocity class, N. F. Ramsey, Phys. Rev. 78, 695
(1950) for the free-evolution phase Delta_R L / v), times an interaction factor that loses the
excess absorption, quadratic in 1/v (the pulse-area result). Its true optimum is found with
scipy.optimize.minimize_scalar, outside the model.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize

from autotune.analysis.velocity_model import fit_inversion_curve

V_REF = 503.7      # m/s, the demo's nominal 2 pi velocity (docs/physics.md section 6)
V_ABS = 505.0      # m/s, velocity of least absorption
CURVATURE = 4.0    # P_e = P_min + k (V_ABS / v - 1)^2
P_MIN = 0.015


def _contrast(v: float, dephasing_at_500: float) -> float:
    phase_spread = dephasing_at_500 * (500.0 / v) ** 2
    return 0.9 * math.exp(-0.5 * phase_spread**2)


def _absorption(v: float) -> float:
    return P_MIN + CURVATURE * (V_ABS / v - 1.0) ** 2


def _inversion(v: float, dephasing_at_500: float) -> float:
    return _contrast(v, dephasing_at_500) * (0.82 - (_absorption(v) - P_MIN))


def _curve(dephasing_at_500: float, velocities: list[float]):
    xs = [V_REF / v - 1.0 for v in velocities]
    design = np.stack([np.ones(len(xs)), xs, np.square(xs)], axis=1)
    p = np.array([_absorption(v) for v in velocities])
    a_coef, *_ = np.linalg.lstsq(design, p, rcond=None)
    return fit_inversion_curve(
        xs, [_inversion(v, dephasing_at_500) for v in velocities], [1e-6] * len(xs),
        p.tolist(), [1e-8] * len(xs), [_contrast(v, dephasing_at_500) for v in velocities],
        [1e-6] * len(xs), a_coef, np.eye(3) * 1e-10, 0.7, V_REF, sorted(set(xs)))


VELOCITIES = [460.0, 480.0, 503.7, 503.7, 530.0, 555.0, 580.0]


def test_without_velocity_dependent_contrast_the_optimum_is_the_least_absorption():
    """Flat contrast (no Ramsey detuning): the inversion peaks where the absorption is least."""
    curve = _curve(0.0, VELOCITIES)
    assert abs(curve.velocity_of(curve.vertex()) - V_ABS) < 2.0


def test_a_contrast_rising_with_velocity_moves_the_optimum_above_the_least_absorption():
    """With Ramsey dephasing the curve's optimum follows the product's (scipy), not the absorption's."""
    dephasing = 0.9  # rad at 500 m/s: a long arm and a large Ramsey detuning
    truth = optimize.minimize_scalar(lambda v: -_inversion(v, dephasing), bounds=(460.0, 580.0),
                                     method="bounded").x
    assert truth > V_ABS + 15.0
    curve = _curve(dephasing, VELOCITIES)
    chosen = curve.velocity_of(curve.vertex())
    assert abs(chosen - truth) < 0.25 * (truth - V_ABS)


def test_the_data_override_a_proxy_that_disagrees():
    """Contrasts that say 'flat' while the inversions rise with v: the evidence widens the prior."""
    dephasing = 0.9
    velocities = VELOCITIES
    xs = [V_REF / v - 1.0 for v in velocities]
    design = np.stack([np.ones(len(xs)), xs, np.square(xs)], axis=1)
    p = np.array([_absorption(v) for v in velocities])
    a_coef, *_ = np.linalg.lstsq(design, p, rcond=None)
    curve = fit_inversion_curve(
        xs, [_inversion(v, dephasing) for v in velocities], [1e-6] * len(xs), p.tolist(),
        [1e-8] * len(xs), [0.9] * len(xs), [1e-6] * len(xs), a_coef, np.eye(3) * 1e-10, 0.7,
        V_REF, sorted(set(xs)))
    assert curve.widened
    assert curve.velocity_of(curve.vertex()) > V_ABS + 10.0


def test_the_log_evidence_is_the_gaussian_marginal_likelihood():
    """The evidence the discrepancy is chosen by is log N(y; X m0, D + X S0 X^T) (Bishop 2006,
    eq. 3.86; Rasmussen and Williams 2006, eq. 2.30), evaluated here by
    scipy.stats.multivariate_normal, up to the constant -n/2 log(2 pi) the code omits."""
    from scipy import stats

    from autotune.analysis.velocity_model import _posterior
    rng = np.random.default_rng(3)
    x = np.linspace(-0.08, 0.08, 6)
    design = np.stack([np.ones(6), x, x * x], axis=1)
    values = 0.7 + 0.3 * x - 3.0 * x * x + 0.02 * rng.standard_normal(6)
    variances = np.full(6, 0.02**2)
    prior_mean = np.array([0.7, 0.1, -2.0])
    prior_cov = np.diag([1.0, 0.07, 0.35]) ** 2
    _, _, evidence = _posterior(design, values, variances, prior_mean, prior_cov)
    reference = stats.multivariate_normal.logpdf(
        values, mean=design @ prior_mean, cov=np.diag(variances) + design @ prior_cov @ design.T)
    assert evidence - 0.5 * 6 * math.log(2.0 * math.pi) == pytest.approx(reference, rel=1e-10)

