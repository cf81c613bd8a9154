"""The phase lock's choice of the next point (pure, no I/O).

Once the detuning lock and the velocity model are established, each next point of
:class:`autotune.analysis.guided.PhaseLockSearch` is the candidate (a lock point at the recommendation,
or a velocity point one or two steps either side) whose measurement is expected to lower the
predicted shortfall's upper bound most per shot. The posterior covariance after a
linear-Gaussian update does not depend on the value to be measured, so the bound a
measurement would leave is known before it is made (see :mod:`autotune.analysis.guided`'s notes).

These functions read the search's posterior through its private helpers: they are the search's
own concern, kept apart from its models; :mod:`autotune.analysis.guided` imports this module, never the
reverse.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING

import numpy as np

from autotune.analysis.search import Proposal
from autotune.analysis.shortfall import Shortfall

if TYPE_CHECKING:
    from autotune.analysis.guided import PhaseLockSearch

__all__ = ["SAME_VELOCITY", "best_proposal", "candidates", "expected_after", "expected_fall"]

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
    lock_cov = lock_fit.cov - np.outer(lock_fit.cov @ x, lock_fit.cov @ x) / (var + x @ lock_fit.cov @ x)
    absorption_cov = residual_cov = None
    fit = search._absorption_fit()
    if search._absorption_ready(fit):
        xv = fit.x_of(velocity)
        f = np.array([1.0, xv, xv * xv])
        avar = expected_absorption_variance(search, fit.value(xv), shots)
        absorption_cov = fit.cov - np.outer(fit.cov @ f, fit.cov @ f) / (avar + f @ fit.cov @ f)
        curve = search._velocity_curve()
        if curve is not None:
            r_cov = curve.residual_cov
            rvar = expected_inversion_variance(search, shots) + avar
            residual_cov = r_cov - np.outer(r_cov @ f, r_cov @ f) / (rvar + f @ r_cov @ f)
    return search._shortfall_at(rec, clock, lock_cov=lock_cov, absorption_cov=absorption_cov,
                              residual_cov=residual_cov, inherit=inherit)


def _best(search: PhaseLockSearch, velocity: float, clock: float | None
          ) -> tuple[Shortfall, tuple[float, str, float, float, int, Shortfall]]:
    """The bound now at the recommendation and the candidate that lowers it most per shot:
    ``(gain per shot, purpose, velocity, detuning, shots per phase, expected bound after)``."""
    rec_delta = search._lock_target(velocity, clock)[0]
    rec = {"velocity": velocity, "detuning": search._clip_detuning(rec_delta)}
    # What this stage's points can lower (a retune's inherited velocity term they cannot).
    now = search._shortfall_at(rec, clock, inherit=False)
    best = None
    for purpose, v, d, shots_per_phase in candidates(search, velocity, clock):
        shots = search._total_shots(shots_per_phase)
        after = expected_after(search, rec, v, d, shots_per_phase, clock, inherit=False)
        gain = (now.upper - after.upper) / shots
        if best is None or gain > best[0] + 1e-15:
            best = (gain, purpose, v, d, shots_per_phase, after)
    assert best is not None
    return now, best


def expected_fall(search: PhaseLockSearch, velocity: float, clock: float | None) -> tuple[float, float]:
    """The bound now and the bound expected after the point :func:`best_proposal` would choose
    (what this stage's points can lower, without a retune's inherited velocity term)."""
    now, best = _best(search, velocity, clock)
    return now.upper, best[5].upper


def best_proposal(search: PhaseLockSearch, velocity: float, clock: float | None) -> Proposal:
    """The candidate whose measurement is expected to lower the bound most per shot."""
    now, (_, purpose, v, d, shots_per_phase, after) = _best(search, velocity, clock)
    term = "detuning" if (now.detuning_upper - after.detuning_upper) >= (now.velocity_upper - after.velocity_upper) \
        else "velocity"
    reason = (f"predicted shortfall's {now.confidence:.0%} bound {now.upper:.2%} (detuning {now.detuning_upper:.2%}, "
              f"velocity {now.velocity_upper:.2%}); this {purpose} point at {v:.1f} m/s, {d / 1e3:+.2f} kHz "
              f"reduces the {term} term most per shot: expected bound {after.upper:.2%} "
              f"(detuning {after.detuning_upper:.2%}, velocity {after.velocity_upper:.2%})")
    return Proposal({"velocity": v, "detuning": d}, purpose, shots_per_phase, reason)
