"""The phase lock's choice of the next point (pure, no I/O).

Once the detuning lock and the velocity model are established, each next point of
:class:`autotune.analysis.guided.PhaseLockSearch` is the candidate (a lock point at the recommendation,
or a velocity point one or two steps either side) whose measurement is expected to lower the
predicted shortfall's upper bound most per shot. The posterior covariance after a
linear-Gaussian update does not depend on the value to be measured, so the bound a
measurement would leave is known before it is made (see :mod:`autotune.analysis.guided`'s notes).

A velocity step whose phase signal comes back unusable (a one-photon contrast below the
gate, say) teaches the bound nothing, so a velocity candidate's expected fall is the fall if
usable times the chance ``p`` of a usable result (:func:`usable_chance`). ``p`` is learned
from this stage's own points: the one-photon contrast is largest at the 2 pi rotation and
falls as the pulse area leaves it on either side (docs/physics.md section 5b), so a velocity
step that came back unusable bears on every velocity beyond it (seen from the lock) and on its
neighbours within a step; a usable point bears on its neighbours and on every velocity farther
from the lock on its side. Where an unusable step bears on a candidate, ``p`` is the mean of
the Beta posterior of the usable and unusable points that bear on it, from a uniform
Beta(1, 1) prior (the conjugate update of a binomial rate, e.g. A. Gelman et al., *Bayesian
Data Analysis*, 3rd ed., 2013, section 2.4); where none does, the gate has not failed on that
side and ``p = 1``, which leaves the choice as it was on a rig whose contrast passes
everywhere.

These functions read the search's posterior through its private helpers: they are the search's
own concern, kept apart from its models; :mod:`autotune.analysis.guided` imports this module, never the
reverse.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import TYPE_CHECKING

import numpy as np

from autotune.analysis.search import Proposal
from autotune.analysis.shortfall import Shortfall
from autotune.errors import ValueRefused

if TYPE_CHECKING:
    from autotune.analysis.guided import PhaseLockSearch

__all__ = ["SAME_VELOCITY", "best_proposal", "candidates", "expected_after", "expected_fall", "points_to_reach",
           "updated_cov", "usable_chance", "usable_evidence"]

#: Two velocities closer than this (relative) are one velocity group of the absorption fit.
SAME_VELOCITY = 0.005
_SAME_VELOCITY = SAME_VELOCITY


def candidates(search: PhaseLockSearch, velocity: float, clock: float | None) -> list[tuple[str, float, float, int]]:
    s = search.settings
    low, high = search._velocity_box
    out = []
    delta = search._lock_target(velocity, clock)[0]
    out.append(("lock", velocity, search._limit_step(delta, velocity), search.step_shots("lock")))
    # One and two steps either side: the curvature and the vertex of the absorption are
    # learned fastest from its wings (the excess grows as the square of the step).
    f = s.velocity_step_fraction
    # A velocity step at the locked detuning that came back out of the capture range says
    # the phase signal is not usable there (a low one-photon contrast, say): the expected
    # gain of another point within half a step of it assumes a usable result and would pick
    # it again and again while nothing is learned.
    unusable = [o.velocity for o in search._obs
                if o.purpose == "velocity" and search._range_note(o.result) is not None]
    seen: list[float] = []
    for factor in (1.0 - f, 1.0 + f, 1.0 - 2.0 * f, 1.0 + 2.0 * f):
        v = float(np.clip(velocity * factor, low, high))
        if abs(v / velocity - 1.0) <= _SAME_VELOCITY or any(abs(v / u - 1.0) <= _SAME_VELOCITY for u in seen):
            continue
        if any(abs(v / u - 1.0) <= 0.5 * f for u in unusable):
            continue
        seen.append(v)
        out.append(("velocity", v, search._limit_step(delta, v), search.step_shots("velocity")))
    return out


def usable_evidence(search: PhaseLockSearch, velocity: float, candidate: float) -> tuple[int, int]:
    """``(usable, unusable)``: this stage's points that bear on a velocity step at ``candidate``
    taken from the lock at ``velocity`` (see the module notes).

    Unusable: velocity steps (measured at the locked detuning, so the velocity is what failed)
    whose phase signal was not usable, within one velocity step of ``candidate`` or between the
    lock and it. Usable: points in the capture range within one step of ``candidate`` or beyond
    it, seen from the lock, on its side.
    """
    f = search.settings.velocity_step_fraction
    side = candidate - velocity
    reach = abs(side)

    def near(u: float) -> bool:
        return abs(u / candidate - 1.0) <= f

    def same_side(u: float) -> bool:
        return (u - velocity) * side > 0.0

    unusable = sum(1 for o in search._obs
                   if o.purpose == "velocity" and search._range_note(o.result) is not None
                   and (near(o.velocity) or (same_side(o.velocity) and abs(o.velocity - velocity) <= reach)))
    usable = sum(1 for o in search._in_range()
                 if near(o.velocity) or (same_side(o.velocity) and abs(o.velocity - velocity) >= reach))
    return usable, unusable


def usable_chance(usable: int, unusable: int) -> float:
    """The chance that the next velocity step comes back usable, from the points that bear on it.

    1 where no unusable step bears on it; else the mean of the Beta(1 + usable, 1 + unusable)
    posterior (a uniform prior updated by the binomial counts), ``(1 + usable) / (2 + usable +
    unusable)``.
    """
    if usable < 0 or unusable < 0:
        raise ValueRefused(f"usable_chance: expected counts >= 0, got {usable!r}, {unusable!r}")
    if unusable == 0:
        return 1.0
    return (1.0 + usable) / (2.0 + usable + unusable)


def points_to_reach(now: float, after: float, target: float) -> float:
    """How many more points like the next one a bound needs to fall from ``now`` to ``target``,
    given that one point is expected to leave ``after`` (inf when it is not expected to fall,
    ``after`` infinite included: no point gives a bound).

    The bound's dominant terms are upper quantiles of a loss quadratic in a Gaussian error (the
    phase error's ``1 - cos(eps / 2)``, the velocity curve's loss near its vertex): at a mean
    near zero the quantile is the error's variance times a chi-square quantile, so it scales as
    the posterior variance. Repeated measurements of the same kind add their information
    (the conjugate normal update, ``1 / v_n = 1 / v_0 + n / s^2``: e.g. A. Gelman et al.,
    *Bayesian Data Analysis*, 3rd ed., 2013, section 2.5), so after ``n`` such points the bound
    is ``now / (1 + n r)`` with ``r = now / after - 1`` from the one point's expected fall, and
    the target needs ``n = (now / target - 1) / r`` of them: ``after / target`` times the linear
    extrapolation of the first point's fall, whose later falls shrink as the information grows.

    The law is exact for one such term at a centred error. Where the error's mean is not near
    zero (a recommendation held at the box edge) the bound has a floor, the loss at the mean, and
    falls slower: the count is then lower than the points really needed, so a verdict that the
    target is out of reach errs towards measuring on. Where two terms alternate and each point
    removes most of one, the bound falls faster than the law and the count is too high; within
    the bar a point is expected to lower the bound by a small part of it (0.03 % of 1.92 % in
    velocity_physics 3 of benchmarks/results/calibration.json), far from that.
    """
    if not math.isfinite(now) or math.isnan(after) or target <= 0.0:
        raise ValueRefused(f"points_to_reach: expected a finite bound now, a bound after that is "
                           f"a number (inf: no point lowers it) and a target > 0, got "
                           f"{now!r}, {after!r}, {target!r}")
    if now <= target:
        return 0.0
    if after >= now:
        return math.inf
    if after <= 0.0:
        return 1.0
    return (now / target - 1.0) / (now / after - 1.0)


def expected_phase_variance(search: PhaseLockSearch, shots: int) -> float:
    points = search._in_range()
    per_shot = [o.result.phase_shift_stderr**2 * o.result.shots for o in points if o.result.shots > 0]
    return float(np.median(per_shot)) / shots if per_shot else (0.1**2)


def expected_inversion_variance(search: PhaseLockSearch, shots: int) -> float:
    points = search._absorption_points() or search._in_range()
    per_shot = [o.result.inversion_stderr**2 * o.result.shots for o in points if o.result.shots > 0]
    return float(np.median(per_shot)) / shots if per_shot else (0.05**2)


def expected_absorption_variance(search: PhaseLockSearch, value: float, shots: int) -> float:
    points = search._absorption_points() or search._in_range()
    floor = 0.005
    per = [o.result.absorption_stderr**2 * o.result.shots / max(o.result.absorption, floor)
           for o in points if o.result.shots > 0]
    if not per:
        return 0.01**2
    return float(np.median(per)) * max(value, floor) / shots


def updated_cov(cov: np.ndarray, features: np.ndarray, variance: float) -> np.ndarray:
    """The posterior covariance of a linear-Gaussian model's coefficients after one more
    measurement ``y = features @ coef + noise`` of noise ``variance``: ``cov - cov f f^T cov /
    (variance + f^T cov f)``, the rank-one (Sherman-Morrison) form of ``(cov^-1 + f f^T /
    variance)^-1``; it does not depend on the value to be measured."""
    g = cov @ features
    return cov - np.outer(g, g) / (variance + features @ cov @ features)


def expected_after(search: PhaseLockSearch, rec: Mapping[str, float], velocity: float, detuning: float,
                    shots_per_phase: int, clock: float | None, inherit: bool = True) -> Shortfall:
    """The shortfall at ``rec`` expected after measuring (velocity, detuning).

    A linear-Gaussian update's posterior covariance does not depend on the value to be
    measured, so it is known before the measurement; the means are kept.
    """
    shots = search._total_shots(shots_per_phase)
    lock_fit = search._lock_fit(rec["velocity"])
    x = lock_fit.features(detuning, clock)
    model = search.settings.phase_velocity_error_rad * abs(velocity / rec["velocity"] - 1.0)
    var = expected_phase_variance(search, shots) + model**2
    lock_cov = updated_cov(lock_fit.cov, x, var)
    absorption_cov = residual_cov = None
    fit = search._absorption_fit()
    if search._absorption_ready(fit):
        xv = fit.x_of(velocity)
        f = np.array([1.0, xv, xv * xv])
        avar = expected_absorption_variance(search, fit.value(xv), shots)
        absorption_cov = updated_cov(fit.cov, f, avar)
        curve = search._velocity_curve()
        if curve is not None:
            rvar = expected_inversion_variance(search, shots) + avar
            residual_cov = updated_cov(curve.residual_cov, f, rvar)
    return search._shortfall_at(rec, clock, lock_cov=lock_cov, absorption_cov=absorption_cov,
                              residual_cov=residual_cov, inherit=inherit)


def _best(search: PhaseLockSearch, velocity: float, clock: float | None
          ) -> tuple[Shortfall, tuple[float, str, float, float, int, Shortfall, float]]:
    """The bound now at the recommendation and the candidate that lowers it most per shot:
    ``(gain per shot, purpose, velocity, detuning, shots per phase, expected bound after,
    chance of a usable result)``."""
    rec_delta = search._lock_target(velocity, clock)[0]
    rec = {"velocity": velocity, "detuning": search._clip_detuning(rec_delta)}
    # What this stage's points can lower (a retune's inherited velocity term they cannot).
    now = search._shortfall_at(rec, clock, inherit=False)
    best = None
    for purpose, v, d, shots_per_phase in candidates(search, velocity, clock):
        # The expected fall if usable, times the chance that it is (a lock point at the
        # established lock: taken as 1).
        chance = usable_chance(*usable_evidence(search, velocity, v)) if purpose == "velocity" else 1.0
        shots = search._total_shots(shots_per_phase)
        after = expected_after(search, rec, v, d, shots_per_phase, clock, inherit=False)
        gain = chance * (now.upper - after.upper) / shots
        if best is None or gain > best[0] + 1e-15:
            best = (gain, purpose, v, d, shots_per_phase, after, chance)
    assert best is not None
    return now, best


def expected_fall(search: PhaseLockSearch, velocity: float, clock: float | None) -> tuple[float, float]:
    """The bound now and the bound expected after the point :func:`best_proposal` would choose
    (what this stage's points can lower, without a retune's inherited velocity term)."""
    now, best = _best(search, velocity, clock)
    return now.upper, best[5].upper


def best_proposal(search: PhaseLockSearch, velocity: float, clock: float | None) -> Proposal:
    """The candidate whose measurement is expected to lower the bound most per shot."""
    now, (_, purpose, v, d, shots_per_phase, after, chance) = _best(search, velocity, clock)
    term = "detuning" if (now.detuning_upper - after.detuning_upper) >= (now.velocity_upper - after.velocity_upper) \
        else "velocity"
    usable = "" if chance == 1.0 else f"; chance of a usable result there {chance:.2f}"
    reason = (f"predicted shortfall's {now.confidence:.0%} bound {now.upper:.2%} (detuning {now.detuning_upper:.2%}, "
              f"velocity {now.velocity_upper:.2%}); this {purpose} point at {v:.1f} m/s, {d / 1e3:+.2f} kHz "
              f"reduces the {term} term most per shot: expected bound {after.upper:.2%} "
              f"(detuning {after.detuning_upper:.2%}, velocity {after.velocity_upper:.2%}){usable}")
    return Proposal({"velocity": v, "detuning": d}, purpose, shots_per_phase, reason)
