"""Tests of autotune.analysis.next_point: how the phase lock weighs its next point.

Checked against outside references: the Beta posterior's mean against scipy.stats.beta, the
linear-Gaussian update against the information form computed directly with numpy (C. M. Bishop,
*Pattern Recognition and Machine Learning*, Springer, 2006, eq. 3.51:
``S_N^-1 = S_0^-1 + beta Phi^T Phi``), and the choice on a synthetic rig whose one-photon
contrast is unusable below a velocity (the synthetic rig of tests/test_guided.py); the points a
bound needs against the conjugate normal update's posterior variance (A. Gelman et al., *Bayesian
Data Analysis*, 3rd ed., 2013, section 2.5: ``1 / v_n = 1 / v_0 + n / s^2``) and the chi-square
quantile of a Gaussian error's square (scipy.stats.chi2; scipy.stats.ncx2 where its mean is not zero).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from autotune.analysis.guided import PhaseLockSearch
from autotune.analysis.next_point import best_proposal, points_to_reach, updated_cov, usable_chance, usable_evidence
from test_guided import BOX, SETTINGS, Synthetic, _run


@pytest.mark.parametrize(("usable", "unusable"), [(0, 1), (0, 2), (3, 1), (5, 4), (12, 30)])
def test_usable_chance_is_the_mean_of_the_beta_posterior(usable, unusable):
    """A uniform Beta(1, 1) prior updated by the counts: the mean of Beta(1 + usable, 1 + unusable) (scipy.stats.beta)."""
    assert usable_chance(usable, unusable) == pytest.approx(stats.beta(1 + usable, 1 + unusable).mean(), rel=1e-12)


def test_usable_chance_is_one_where_no_step_has_failed_and_refuses_negative_counts():
    """No unusable step bearing on a velocity: taken as usable (the comparison as on a rig whose contrast passes)."""
    assert usable_chance(0, 0) == 1.0 and usable_chance(7, 0) == 1.0
    with pytest.raises(ValueError, match="usable_chance"):
        usable_chance(-1, 2)


@pytest.mark.parametrize(("prior_var", "noise_var", "points"), [(1.0, 1.0, 3), (4.0, 0.5, 12), (0.2, 2.0, 7),
                                                              (1e-2, 1e-3, 25)])
def test_points_to_reach_counts_the_information_of_repeated_points(prior_var, noise_var, points):
    """A 95 % bound on the square of a Gaussian error of mean 0: ``v_n`` times the chi-square
    quantile (scipy.stats.chi2, one degree of freedom), ``v_n`` the conjugate normal posterior
    variance after ``n`` measurements of variance ``s^2`` (Gelman et al. 2013, section 2.5). From
    the bound now and after one point, the points to the bound after ``points`` are ``points``;
    the first point's fall extrapolated linearly says fewer."""
    q = float(stats.chi2.ppf(0.95, 1))

    def bound(n: int) -> float:
        return q / (1.0 / prior_var + n / noise_var)

    now, after, target = bound(0), bound(1), bound(points)
    assert points_to_reach(now, after, target) == pytest.approx(points, rel=1e-9)
    assert (now - target) / (now - after) < points
    # Half-way there, the same law from the bound then.
    assert points_to_reach(bound(points // 2), bound(points // 2 + 1), target) == \
        pytest.approx(points - points // 2, rel=1e-9)


def _phase_bound(n: int, prior_var: float, noise_var: float, mean: float) -> float:
    """The 95 % upper bound of the shortfall ``1 - cos(eps / 2)`` of a Gaussian phase error of
    ``mean`` (rad) after ``n`` measurements (conjugate normal variance, Gelman et al. 2013,
    section 2.5): ``eps^2 / v_n`` is noncentral chi-square with one degree of freedom and
    noncentrality ``mean^2 / v_n`` (scipy.stats.ncx2; scipy.stats.chi2 at mean 0)."""
    var = 1.0 / (1.0 / prior_var + n / noise_var)
    q = float(stats.ncx2.ppf(0.95, 1, mean**2 / var)) if mean else float(stats.chi2.ppf(0.95, 1))
    return 1.0 - math.cos(math.sqrt(var * q) / 2.0)


@pytest.mark.parametrize(("prior_var", "noise_var", "points"), [(0.04, 0.4, 5), (0.05, 2.0, 30), (0.03, 0.1, 3)])
def test_points_to_reach_on_the_phase_shortfall_itself_at_a_centred_error(prior_var, noise_var, points):
    """The law is that of the quadratic loss; on the shortfall ``1 - cos(eps / 2)`` itself at a
    centred error, with bounds of 1-2.5 % as the stage meets them within the bar, the count is the
    true one to 0.1 %."""
    now, after, target = (_phase_bound(n, prior_var, noise_var, 0.0) for n in (0, 1, points))
    assert 0.007 < target < now < 0.025
    assert points_to_reach(now, after, target) == pytest.approx(points, rel=1e-3)


@pytest.mark.parametrize("mean", [0.05, 0.1, 0.15])
def test_points_to_reach_is_a_lower_count_where_the_error_is_not_centred(mean):
    """Where the phase error's mean is not near zero (a recommendation held at the box edge), the
    bound has a floor, ``1 - cos(mean / 2)``, and falls slower than the law: the count is lower
    than the points the bound really needs, so "out of reach" is said only when even the lower
    count is more than the points left (it errs towards measuring on)."""
    prior_var, noise_var = 0.04, 0.4
    now, after = _phase_bound(0, prior_var, noise_var, mean), _phase_bound(1, prior_var, noise_var, mean)
    for points in (3, 8, 20):
        target = _phase_bound(points, prior_var, noise_var, mean)
        assert points_to_reach(now, after, target) < points


def test_points_to_reach_at_the_target_without_a_fall_and_on_bad_input():
    """Already at the target: none; a next point not expected to lower the bound (its bound
    after as large, or infinite: no point gives one): infinitely many; a bound now that is not
    finite, a bound after that is no number, or a target <= 0: a clear error."""
    assert points_to_reach(0.009, 0.008, 0.01) == 0.0
    assert points_to_reach(0.015, 0.015, 0.01) == float("inf")
    assert points_to_reach(0.015, float("inf"), 0.01) == float("inf")
    assert points_to_reach(0.015, 0.0, 0.01) == 1.0
    for bad in ((float("inf"), 0.01, 0.01), (0.02, float("nan"), 0.01), (0.02, 0.01, 0.0)):
        with pytest.raises(ValueError, match="points_to_reach"):
            points_to_reach(*bad)


def test_updated_covariance_is_the_information_form_of_the_update():
    """cov - cov f f^T cov / (var + f^T cov f) equals (cov^-1 + f f^T / var)^-1 (Bishop 2006, eq. 3.51; numpy.linalg.inv)."""
    rng = np.random.default_rng(11)
    for _ in range(20):
        a = rng.normal(size=(3, 3))
        cov = a @ a.T + 0.1 * np.eye(3)
        f = rng.normal(size=3)
        var = float(rng.uniform(0.01, 2.0))
        direct = np.linalg.inv(np.linalg.inv(cov) + np.outer(f, f) / var)
        np.testing.assert_allclose(updated_cov(cov, f, var), direct, rtol=1e-9, atol=1e-12)


def test_an_unusable_velocity_step_lowers_the_chance_beyond_it_not_on_the_other_side():
    """On a synthetic rig whose one-photon contrast is unusable below 490 m/s (docs/physics.md
    section 5b: the contrast falls as the pulse area leaves 2 pi), velocity steps that came back
    unusable count against every velocity beyond them, seen from the lock, and not against the
    other side; the next point chosen is never a velocity step into the unusable region."""
    # A ratio of 0.03, not 0.15: the phase-error gate of a poor source takes 0.15 with its noise
    # (tests/test_guided.py's low-contrast tests do the same).
    rig = Synthetic(peak_detuning_hz=5e3, velocity_star=520.0, seed=4,
                    contrast_ratio=lambda v, d: 0.03 if v < 490.0 else 0.73)
    lock = PhaseLockSearch(BOX, seed=2, start={"velocity": 470.0, "detuning": 0.0}, settings=SETTINGS)
    _, proposals = _run(lock, rig, max_points=80)
    failed = [p.point["velocity"] for p in proposals if p.purpose == "velocity" and p.point["velocity"] < 490.0]
    assert failed, "the run should have met the unusable region"
    velocity = lock.recommend(clock_s=rig.clock).point["velocity"]
    low = min(failed) - 1.0
    usable, unusable = usable_evidence(lock, velocity, low)
    assert unusable >= len([v for v in failed if v >= low])
    assert usable_chance(usable, unusable) < 0.5
    high = min(velocity * 1.08, 559.0)
    assert usable_evidence(lock, velocity, high)[1] == 0
    assert usable_chance(*usable_evidence(lock, velocity, high)) == 1.0
    proposal = best_proposal(lock, velocity, rig.clock)
    assert proposal.purpose == "lock" or proposal.point["velocity"] >= 490.0

