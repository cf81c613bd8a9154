"""Tests of autotune.analysis.next_point: how the phase lock weighs its next point.

Checked against outside references: the Beta posterior's mean against scipy.stats.beta, the
linear-Gaussian update against the information form computed directly with numpy (C. M. Bishop,
*Pattern Recognition and Machine Learning*, Springer, 2006, eq. 3.51:
``S_N^-1 = S_0^-1 + beta Phi^T Phi``), and the choice on a synthetic rig whose one-photon
contrast is unusable below a velocity (the synthetic rig of tests/test_guided.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from autotune.analysis.guided import PhaseLockSearch
from autotune.analysis.next_point import best_proposal, updated_cov, usable_chance, usable_evidence
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

