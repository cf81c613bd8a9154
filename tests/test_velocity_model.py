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


def test_the_reference_contrast_is_the_gaussian_average_of_the_ramsey_phase():
    """The reference rig's contrast law (docs/physics.md section 3), exp(-s^2 / 2) with s = 2 pi
    Delta_R L sigma_v / v^2, is the normal characteristic function, E[cos X] = exp(-s^2 / 2) for
    X ~ N(0, s^2) (scipy.stats.norm.expect), and matches the fringe averaged over a Gaussian
    velocity class with the exact phase 2 pi Delta_R L / v (N. F. Ramsey, Phys. Rev. 78, 695
    (1950); the average by scipy.integrate.quad over scipy.stats.norm.pdf) within 5e-4 of the
    contrast at 40 kHz, 12 cm, 6 m/s from 460 to 560 m/s (the notes state 3e-4: first order in
    sigma_v / v)."""
    from scipy import integrate, stats

    for s in (0.2, 0.7, 1.3):
        assert stats.norm.expect(np.cos, scale=s) == pytest.approx(math.exp(-s * s / 2), rel=1e-9)
    detuning_hz, arm_m, spread_m_per_s = 40e3, 0.12, 6.0

    def fringe_amplitude(v: float) -> float:
        def part(w: float, trig) -> float:
            return trig(2.0 * math.pi * detuning_hz * arm_m / w) * stats.norm.pdf(w, v, spread_m_per_s)
        lo, hi = v - 12.0 * spread_m_per_s, v + 12.0 * spread_m_per_s
        re = integrate.quad(part, lo, hi, args=(np.cos,), limit=400, points=[v])[0]
        im = integrate.quad(part, lo, hi, args=(np.sin,), limit=400, points=[v])[0]
        return math.hypot(re, im)

    for v in (460.0, 500.0, 560.0):
        phase_spread = 2.0 * math.pi * detuning_hz * arm_m * spread_m_per_s / v**2
        assert fringe_amplitude(v) == pytest.approx(math.exp(-0.5 * phase_spread**2), abs=5e-4)
    # The reference rig's own form, dephasing_at_500 (500 / v)^2, is the same law.
    s500 = 2.0 * math.pi * detuning_hz * arm_m * spread_m_per_s / 500.0**2
    assert _contrast(530.0, s500) / 0.9 == pytest.approx(fringe_amplitude(530.0), abs=5e-4)


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



# The disagreement of the measured inversions with the proxy (velocity_model.proxy_disagreement)
# --------------------------------------------------------------------------------------------

def _groups(rng: np.random.Generator):
    """Three velocity groups of 1, 3 and 2 points with unequal variances."""
    x = np.array([-0.05, 0.0, 0.0005, -0.0004, 0.05, 0.0496])
    sd = np.array([0.026, 0.05, 0.06, 0.07, 0.028, 0.03])
    y = 0.75 + 0.4 * x + sd * rng.standard_normal(len(x))
    return x, y, sd, [-0.05, 0.0, 0.05]


def test_the_slope_is_numpy_polyfit_of_the_weighted_group_means():
    """The measured slope and its sd are numpy.polyfit's weighted straight line (cov='unscaled')
    through the groups' inverse-variance means (numpy.average), and the proxy's slope the same
    fit through the proxy's curve."""
    from autotune.analysis.velocity_model import proxy_disagreement

    x, y, sd, groups = _groups(np.random.default_rng(5))
    d = proxy_disagreement(x, y, sd**2, [0.3, -4.0], np.zeros((2, 2)), groups)
    members = [np.array([0]), np.array([1, 2, 3]), np.array([4, 5])]
    gx = np.array([np.average(x[m], weights=sd[m] ** -2) for m in members])
    gm = np.array([np.average(y[m], weights=sd[m] ** -2) for m in members])
    gsd = np.array([np.sum(sd[m] ** -2) ** -0.5 for m in members])
    coef, cov = np.polyfit(gx, gm, 1, w=1.0 / gsd, cov="unscaled")
    assert d.slope == pytest.approx(coef[0], rel=1e-10)
    assert d.slope_stderr == pytest.approx(math.sqrt(cov[0, 0]), rel=1e-10)
    np.testing.assert_allclose(d.mean, gm, rtol=1e-12)
    np.testing.assert_allclose(d.mean_stderr, gsd, rtol=1e-12)
    proxy = np.polyfit(gx, 0.3 * gx - 4.0 * gx**2, 1, w=1.0 / gsd)[0]
    assert d.proxy_slope == pytest.approx(proxy, rel=1e-10)


def test_the_z_and_p_value_are_the_two_sided_normal_test_of_scipy_stats():
    """z = (slope - proxy slope) / sqrt(both variances); p = 2 scipy.stats.norm.sf(|z|), with
    the proxy's variance a P a^T for the least-squares slopes a of x and x^2 (numpy.polyfit)."""
    from scipy import stats

    from autotune.analysis.velocity_model import proxy_disagreement

    x, y, sd, groups = _groups(np.random.default_rng(6))
    proxy_cov = np.array([[0.2**2, 0.3 * 0.2 * 1.5], [0.3 * 0.2 * 1.5, 1.5**2]])
    d = proxy_disagreement(x, y, sd**2, [-0.2, -3.0], proxy_cov, groups)
    gx, gsd = d.x, d.mean_stderr
    along = np.array([np.polyfit(gx, gx, 1, w=1.0 / gsd)[0], np.polyfit(gx, gx**2, 1, w=1.0 / gsd)[0]])
    assert d.proxy_slope_stderr == pytest.approx(math.sqrt(along @ proxy_cov @ along), rel=1e-9)
    z = (d.slope - d.proxy_slope) / math.hypot(d.slope_stderr, d.proxy_slope_stderr)
    assert d.z == pytest.approx(z, rel=1e-12)
    assert d.p_value == pytest.approx(2.0 * stats.norm.sf(abs(z)), rel=1e-9)


def test_under_the_null_the_residuals_have_their_stated_sd_and_the_test_its_level():
    """Data drawn from the proxy (its slope and curvature drawn from its covariance, any level,
    the stated noise): the residuals' sampling sd matches residual_stderr (5 %, 4000 draws) and
    p < 0.05 holds in 5 % of draws (within the binomial 99.9 % interval, scipy.stats.binomtest)."""
    from scipy import stats

    from autotune.analysis.velocity_model import proxy_disagreement

    rng = np.random.default_rng(7)
    x, _, sd, groups = _groups(rng)
    mean = np.array([0.1, -4.0])
    proxy_cov = np.diag([0.15, 1.0]) ** 2
    residuals, rejected = [], 0
    n = 4000
    for _ in range(n):
        p = rng.multivariate_normal(mean, proxy_cov)
        y = rng.uniform(0.5, 0.8) + p[0] * x + p[1] * x**2 + sd * rng.standard_normal(len(x))
        d = proxy_disagreement(x, y, sd**2, mean, proxy_cov, groups)
        residuals.append(d.residual)
        rejected += d.significant(0.05)
    np.testing.assert_allclose(np.std(residuals, axis=0), d.residual_stderr, rtol=0.05)
    interval = stats.binomtest(rejected, n, 0.05).proportion_ci(0.999)
    assert interval.low <= 0.05 <= interval.high


def test_the_farthest_group_is_the_outlier():
    """An inversion 0.1 above a flat r at one end: the test is significant and names that group."""
    from autotune.analysis.velocity_model import proxy_disagreement

    x = np.array([-0.05, 0.0, 0.05])
    y = np.array([0.75, 0.75, 0.85])
    sd = np.array([0.025, 0.025, 0.025])
    d = proxy_disagreement(x, y, sd**2, [0.0, 0.0], np.zeros((2, 2)), x)
    assert d.significant() and d.z > 0.0
    assert d.farthest_group() == 2


def test_one_group_states_no_disagreement_and_bad_input_is_refused():
    """A single velocity group has no slope (None); a zero variance is refused by name."""
    from autotune.analysis.velocity_model import proxy_disagreement
    from autotune.errors import ValueRefused

    assert proxy_disagreement([0.0, 0.001], [0.7, 0.71], [1e-3, 1e-3], [0.0, 0.0],
                              np.zeros((2, 2)), [0.0]) is None
    with pytest.raises(ValueRefused, match="variances"):
        proxy_disagreement([0.0, 0.05], [0.7, 0.71], [1e-3, 0.0], [0.0, 0.0], np.zeros((2, 2)),
                           [0.0, 0.05])
