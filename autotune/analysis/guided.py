"""The phase lock: calibrate on the physics' own error signals (pure, no I/O).

The inversion is flat at its top, so a search on it alone spends most of its shots telling
noise from a fraction of a percent. The same fringe pair measures two sharper signals
(docs/physics.md section 5b), and :class:`PhaseLockSearch` steers on them:

- **Detuning: a lock on the photon phase shift.** With the one-photon amplitude
  ``a = |a| e^{i chi}`` and ``chi = pi - eps``, the inversion of ideal fringes (docs/physics.md
  section 3's ``P_g(phi) = (1 + |a|^2 - 2 |a| cos(chi + phi)) / 4``, maximised over the Ramsey
  phase as in section 5) is ``(|a|^2 - 1) / 4 + |1 + |a| e^{i eps}| / 2``, which for ``|a| = 1``
  is ``cos(eps / 2)``: a phase error ``eps`` costs ``1 - cos(eps / 2) ~ eps^2 / 8`` of the
  inversion. The phase shift is a signed, nearly linear function of the detuning, so a
  weighted fit ``phi = alpha + s d + c (d / h)^3 + beta (t - t_ref)`` (``d`` the detuning from
  the fit's centre, ``h`` the bracket step; the cubic term is odd because the crossing's
  amplitude at ``-delta`` is the complex conjugate of that at ``+delta`` for any real mode
  profile (``sigma_x H(delta) sigma_x = H(-delta)`` in docs/physics.md section 2's Hamiltonian), and
  ``beta`` is a drift of the cavity during the calibration, with a Gaussian prior centred on 0
  that is widened fourfold when the data's marginal likelihood prefers it) gives the detuning
  ``delta*`` where the phase
  equals the phase at the peak ``phi*``, with its uncertainty. ``phi*`` has a prior centred
  on pi (the 2 pi rotation's sign flip, docs/physics.md section 1) and is refined by the
  inversions through the ``cos(eps / 2)`` law (a grid posterior, the inversion scale solved in
  closed form per velocity at each grid value).
- **Velocity: the inversion itself, with the physics as its prior.** ``P_e(one photon) = p1
  |a_e(1)|^2 / 2`` vanishes at an exact resonant 2 pi rotation and grows as the pulse area
  (``oc 1 / v``, docs/physics.md section 2's pulse-area result) moves away from 2 pi (section 5b).
  With ``|a|^2 = 1 - x`` the inversion above falls by about ``x / 2``, i.e. by the excess
  absorption ``Delta P_e`` (with ``p1`` in both). But the least absorption is the best velocity
  only when nothing else in the inversion depends on velocity: at the locked detuning a
  weighted quadratic fit of ``P_e`` in ``x = v_ref / v - 1`` over a few velocities, and the
  inversion curve of :mod:`autotune.analysis.velocity_model` (the measured inversions, with the
  empty-fringe contrast's shape minus the absorption as the prior mean) gives the velocity of
  the highest inversion, extending towards higher inversion while it is not bracketed (up to
  the box edge, which it then says, and whether the data point outward there). A retune keeps
  the absorption curve stored around the last good velocity.
- **The posterior decides.** The predicted shortfall of the recommendation below the best is
  the detuning term ``1 - cos(eps / 2)`` with ``eps`` from the lock's posterior (phase
  prediction and ``phi*``) plus the velocity term, the relative inversion lost against the
  best of the inversion curve's posterior (a retune: ``Delta P_e / I`` over the stored
  curve); its upper quantile at ``confidence`` comes from seeded posterior draws (the
  detuning term alone also from ``scipy.stats.ncx2``). Once the lock and the velocity are
  established, each next point is the candidate (a lock point at the recommendation, or a
  velocity point one or two steps either side) whose measurement is expected to lower that bound
  most per shot (the posterior covariance after a linear-Gaussian update does not depend on
  the value to be measured); each proposal's ``reason`` says which term and by how much.
  :meth:`PhaseLockSearch.converged` is true when the bound is below ``target_shortfall``.
- **Fallback.** Where the phase signal is not usable (fringes not identified, a one-photon
  contrast too low against the empty one, or a phase error beyond the capture range, where
  the angle wraps), a Gaussian-process search on the inversion
  (:class:`autotune.analysis.search.BayesianSearch` over the box, told every result) proposes points
  until one lands in the capture range; the lock starts there.

How the closed loop drives it
-----------------------------
Calibration::

    lock = PhaseLockSearch(space, seed=seed, start=nominal, settings=LockSettings(...))
    while budgets allow:
        p = lock.propose(clock_s=now)              # Proposal: point, purpose, shots, reason
        r = measure(p.point, p.shots_per_phase or the loop's default for p.purpose)
        lock.observe(p.point, r, purpose=p.purpose)  # r: PointResult.from_estimate(...)
        if lock.converged(clock_s=now): break      # lock.shortfall(now) has the numbers
    rec = lock.recommend(clock_s=now + half the verification's duration)
    r = measure(rec.point, verification precision); lock.observe(rec.point, r, purpose="verify")
    up to N times: c = lock.correction(clock_s=now); if c is None: stop
                   r = measure(c.point, verification precision)
                   lock.observe(c.point, r, purpose="correct")
    store lock.learned_prior(clock_s=now).to_dict() with the last good set-points (None when
    lock and velocity were not established: the next retune then runs without a prior)

Retune::

    lock = PhaseLockSearch(box, seed=seed, start=last_good, prior=LockPrior.from_dict(stored))
    p = lock.propose()                   # purpose "check" at the last good set-points
    r = measure(p.point, check precision); lock.observe(p.point, r, purpose="check")
    v = lock.verdict(clock_s=now)        # still_good, reason, numbers
    if v.still_good: done
    then the calibration's loop from its first line: propose() gives
      - "correct" at the corrected set-points when the check was in range and the stored slope
        predicts them within the target: measured at verification precision, it IS the
        verification (observe it as "correct", then the correction() cycle);
      - "lock" at the corrected set-points when the prediction is not good enough: a cheap
        step first, then the loop goes on until converged() and verifies recommend();
      - "search" (the Gaussian process) when the check was out of the capture range.

Pass ``recommend`` the clock at the middle of the verification (now plus half its duration):
the lock's drift term then leads a drifting cavity.

Shots: ``shots_per_phase=None`` means the loop's configured default for the purpose (search
points: ``measurement.shots_per_phase``; ``"check"``: the check's precision; ``"correct"``:
the verification's). Lock and velocity steps carry :meth:`PhaseLockSearch.step_shots`: the
configured ``LockSettings.lock_shots_per_phase`` and ``velocity_shots_per_phase`` until a
usable point is measured, then the shots that give a lock step a phase standard error of
``step_phase_stderr_rad`` and a velocity step an absorption standard error of
``step_absorption_stderr`` from the measured error per shot (a poor one-photon source or a low
atom flux raises it), within ``step_shots_range`` times the configured shots. Their default, 500 each, comes from a comparison on 20 scenarios
of the simulated rig drawn over the benchmark's ranges (one draw, used for this choice only;
6 Ramsey phases, a 72,000-shot verification): median search shots, worst final true ratio,
scenarios at >= 0.98: 300/300: 32,400, 0.979, 19; 400/400: 43,200, 0.991, 20; 500/500:
45,000, 0.991, 20; 750/750: 63,000, 0.990, 20; 1000/1000: 78,000, 0.993, 20; 1500/1500:
108,000, 0.997, 20; 500 lock / 1000 velocity: 60,000, 0.993, 20. Below 500 the points
multiply (9 instead of 7.5) for little saving and the worst case slips; a rig with fewer
atoms per shot would also leave too few for a fringe.

Resuming without saved state
----------------------------
Every decision is a deterministic function of the constructor arguments and of the results
observed so far, in order (with their purposes and clocks); seeded posterior draws derive
from ``seed`` and the number of results. Rebuild with the same arguments, re-observe the
journal's results in order, and the next proposal and the recommendation are the same.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import special, stats

from autotune.analysis.lock_fit import (
    LockFit,
    log_evidence,
    solve_gaussian,
    wrap_phase,
    detuning_offset,
    phase_signal_note,
)
from autotune.analysis.lock_settings import LockPrior, LockSettings, is_number
from autotune.analysis.next_point import SAME_VELOCITY, best_proposal, expected_after, expected_fall
from autotune.analysis.retune_verdict import inherited_draws, retune_verdict
from autotune.analysis.shortfall import Shortfall, Verdict, finite_or_none
from autotune.analysis.velocity_model import InversionCurve, AbsorptionFit, cholesky_jittered, fit_inversion_curve
from autotune.analysis.search import (
    PURPOSES,
    BayesianSearch,
    PointResult,
    Proposal,
    Recommendation,
    SearchSpace,
)
from autotune.wire.rig import measurement_shots

__all__ = ["LockSettings", "LockPrior", "Shortfall", "Verdict", "PhaseLockSearch",
           "phase_signal_note", "detuning_offset"]

_TWO_PI = 2.0 * math.pi
# Two velocities closer than this (relative) are one velocity group of the absorption fit.
_SAME_VELOCITY = SAME_VELOCITY
# A point within this relative velocity of the recommendation counts as measured there (the
# phase at the peak does not depend on the velocity, and the velocity tolerance is several %).
_AT_VELOCITY = 0.02
# The drift prior may widen by this factor when the data's marginal likelihood prefers it.
_DRIFT_WIDENING = 4.0
# Grid points of the posterior over the phase at the peak.
_PHASE_GRID = 241
# Smallest inversion scale used as the denominator of the velocity term.
_MIN_INVERSION_SCALE = 0.05


@dataclass(frozen=True)
class _Obs:
    velocity: float
    detuning: float
    result: PointResult
    purpose: str


# --------------------------------------------------------------------------------------------
# The strategy
# --------------------------------------------------------------------------------------------


class PhaseLockSearch:
    """Calibrate by locking the photon phase shift and minimising the absorption.

    See the module docstring for the physics, the models and how the loop drives it.

    Parameters
    ----------
    space : SearchSpace
        The box; must have the dimensions ``"velocity"`` (m/s) and ``"detuning"`` (Hz).
    seed : int
        Seed of the posterior draws and of the Gaussian-process fallback.
    start : mapping
        Where to begin: the nominal 2 pi point for a calibration, the last good set-points for
        a retune (the check). Must lie in the box.
    settings : LockSettings
        See :class:`LockSettings`.
    prior : LockPrior, optional
        What the last calibration learned; makes this a retune (first proposal: the check at
        ``start``).

    Notes
    -----
    Implements :class:`autotune.analysis.search.Strategy`. ``ask``/``tell`` exist for the protocol's
    sake: ``tell`` gives only an inversion, so the strategy can then only search with its
    Gaussian process; the loop should use ``propose``/``observe``.
    """

    name = "phase_lock"

    def __init__(self, space: SearchSpace, *, seed: int, start: Mapping[str, float],
                 settings: LockSettings | None = None, prior: LockPrior | None = None) -> None:
        if not isinstance(space, SearchSpace):
            raise ValueError(f"space: expected a SearchSpace, got {type(space).__name__}")
        if set(space.names) != {"velocity", "detuning"}:
            raise ValueError(f"space: expected the dimensions ['velocity', 'detuning'], got {list(space.names)}")
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
            raise ValueError(f"seed: expected an integer, got {seed!r}")
        settings = LockSettings() if settings is None else settings
        if not isinstance(settings, LockSettings):
            raise ValueError(f"settings: expected a LockSettings, got {type(settings).__name__}")
        if prior is not None and not isinstance(prior, LockPrior):
            raise ValueError(f"prior: expected None or a LockPrior (LockPrior.from_dict), got {type(prior).__name__}")
        try:
            start_values = space.to_array(start)
        except ValueError as exc:
            raise ValueError(f"start: {exc}") from None
        if not space.contains(start):
            raise ValueError(f"start: expected a point inside the box "
                             f"{dict(zip(space.names, zip(space.lows.tolist(), space.highs.tolist())))}, "
                             f"got {dict(start)}")
        self.space = space
        self.seed = int(seed)
        self.settings = settings
        self.prior = prior
        self.start = space.to_point(start_values)
        self._velocity_box = (space.dimensions[space.names.index("velocity")].low,
                              space.dimensions[space.names.index("velocity")].high)
        self._detuning_box = (space.dimensions[space.names.index("detuning")].low,
                              space.dimensions[space.names.index("detuning")].high)
        width = self._detuning_box[1] - self._detuning_box[0]
        self.step_hz = float(settings.bracket_step_hz) if settings.bracket_step_hz is not None else width / 12.0
        self.max_lock_step_hz = (float(settings.max_lock_step_hz) if settings.max_lock_step_hz is not None
                                 else 2.0 * self.step_hz)
        if prior is not None:
            self._phase_star_prior = (prior.phase_at_peak_rad, prior.phase_at_peak_stderr_rad)
        else:
            self._phase_star_prior = (float(settings.phase_at_peak_rad), float(settings.phase_at_peak_prior_rad))
        self._obs: list[_Obs] = []
        self._cache: dict[Any, Any] = {}
        self._gp: BayesianSearch | None = None
        self._gp_told = 0

    # -- bookkeeping ------------------------------------------------------------------------

    @property
    def n_told(self) -> int:
        """Results observed so far (every purpose)."""
        return len(self._obs)

    def exhausted(self) -> bool:
        """Always False: the loop's budgets bound the search."""
        return False

    @staticmethod
    def _check_clock(clock_s: Any) -> float | None:
        if clock_s is None:
            return None
        if not is_number(clock_s) or not math.isfinite(float(clock_s)):
            raise ValueError(f"clock_s: expected None or a finite number of seconds, got {clock_s!r}")
        return float(clock_s)

    def _now(self, clock_s: Any) -> float | None:
        """The query clock: ``clock_s``, else the last result's clock."""
        clock = self._check_clock(clock_s)
        if clock is not None:
            return clock
        for obs in reversed(self._obs):
            if obs.result.clock_s is not None:
                return obs.result.clock_s
        return None

    def _cached(self, key: Any, compute: Any) -> Any:
        full = (len(self._obs), key)
        if full not in self._cache:
            self._cache[full] = compute()
        return self._cache[full]

    def _draw_normals(self, size: int, stream: int) -> np.ndarray:
        rng = np.random.default_rng([self.seed, stream, len(self._obs)])
        return rng.standard_normal((self.settings.posterior_draws, size))

    def observe(self, point: Mapping[str, float], result: PointResult, *, purpose: str = "search") -> None:
        """Record everything measured at ``point``.

        Parameters
        ----------
        point : mapping
            The set-points measured (inside the box, within float rounding).
        result : PointResult
            What the fringe pair measured there.
        purpose : str
            The proposal's purpose, ``"verify"`` for the loop's verification (a ``"correct"``
            proposal's measurement may be observed as ``"correct"`` or ``"verify"``).

        Raises
        ------
        ValueError
            An unknown purpose, a result that is not a PointResult, or a point outside the box.
        """
        if purpose not in PURPOSES:
            raise ValueError(f"purpose: expected one of {list(PURPOSES)}, got {purpose!r}")
        if not isinstance(result, PointResult):
            raise ValueError(f"result: expected a PointResult (PointResult.from_estimate), got {type(result).__name__}")
        values = self.space.to_array(point)
        slack = 1e-9 * (self.space.highs - self.space.lows)
        if np.any(values < self.space.lows - slack) or np.any(values > self.space.highs + slack):
            raise ValueError(f"point: expected within "
                             f"{dict(zip(self.space.names, zip(self.space.lows.tolist(), self.space.highs.tolist())))}, "
                             f"got {dict(point)}")
        values = np.clip(values, self.space.lows, self.space.highs)
        named = dict(zip(self.space.names, values.tolist()))
        self._obs.append(_Obs(float(named["velocity"]), float(named["detuning"]), result, str(purpose)))
        self._cache.clear()

    def tell(self, point: Mapping[str, float], value: float, stderr: float, *,
             clock_s: float | None = None) -> None:
        """Record an inversion alone (no phase signal): the point counts as out of the capture range."""
        for label, number in (("value", value), ("stderr", stderr)):
            if not is_number(number) or not math.isfinite(float(number)):
                raise ValueError(f"{label}: expected a finite number, got {number!r}")
        result = PointResult(
            inversion=float(value), inversion_stderr=float(stderr), phase_shift=0.0,
            phase_shift_stderr=_TWO_PI / math.sqrt(12.0), absorption=0.5, absorption_stderr=0.5,
            contrast_empty=0.0, contrast_empty_stderr=1.0, contrast_one_photon=0.0,
            contrast_one_photon_stderr=1.0, identified=False, clock_s=self._check_clock(clock_s), shots=0)
        self.observe(point, result, purpose="search")

    def ask(self, *, clock_s: float | None = None) -> dict[str, float]:
        """The point of :meth:`propose`."""
        return dict(self.propose(clock_s=clock_s).point)

    # -- the phase signal -------------------------------------------------------------------

    def _phase_error(self, result: PointResult, centre: float | None = None) -> float:
        centre = self._phase_star_prior[0] if centre is None else centre
        return float(wrap_phase(result.phase_shift - centre))

    def _range_note(self, result: PointResult) -> str | None:
        """None when the point's phase signal is usable, else why not."""
        return phase_signal_note(result, self.settings, self._phase_star_prior[0])

    def _in_range(self) -> list[_Obs]:
        return self._cached("in_range", lambda: [o for o in self._obs if self._range_note(o.result) is None])

    def _unwrapped(self, obs: _Obs) -> float:
        centre = self._phase_star_prior[0]
        return centre + self._phase_error(obs.result, centre)

    def _slope_prior(self) -> tuple[float, float] | None:
        if self.prior is None:
            return None
        s = self.prior.slope_rad_per_hz
        sd = math.hypot(self.prior.slope_stderr_rad_per_hz, self.settings.prior_slope_tolerance_fraction * s)
        return s, sd

    def _lock_fit(self, velocity: float) -> LockFit | None:
        return self._cached(("lock", round(velocity, 9)), lambda: self._compute_lock_fit(velocity))

    def _compute_lock_fit(self, velocity: float) -> LockFit | None:
        points = self._in_range()
        if not points:
            return None
        s_set = self.settings
        h = self.step_hz
        detunings = np.array([o.detuning for o in points])
        phases = np.array([self._unwrapped(o) for o in points])
        model = s_set.phase_velocity_error_rad * np.array([abs(o.velocity / velocity - 1.0) for o in points])
        variances = np.array([o.result.phase_shift_stderr for o in points]) ** 2 + model**2
        variances = np.maximum(variances, 1e-8)
        clocks = [o.result.clock_s for o in points]
        drift = s_set.drift_prior_hz_per_s > 0.0 and all(c is not None for c in clocks) and len(points) >= 2
        t_ref = max(clocks) if drift else None
        taus = np.array([c - t_ref for c in clocks]) if drift else np.zeros(len(points))
        phase_star = self._phase_star_prior[0]
        slope_prior = self._slope_prior()
        wide_slope = math.pi / h
        cubic_prior_mean = 0.0 if self.prior is None else self.prior.cubic_rad_per_hz3 * h**3

        # Pass 1: a line through the point closest to the peak, for the scales of the priors.
        nearest = int(np.argmin(np.abs(phases - phase_star)))
        centre = float(detunings[nearest])
        design = np.stack([np.ones(len(points)), detunings - centre], axis=1)
        mean0 = np.array([phase_star, slope_prior[0] if slope_prior else 0.0])
        precision0 = np.diag([1.0 / (_TWO_PI**2), 1.0 / (slope_prior[1] if slope_prior else wide_slope) ** 2])
        theta, _ = solve_gaussian(design, phases, variances, mean0, precision0)
        slope_scale = abs(float(theta[1]))

        cubic_sd = s_set.phase_cubic_prior_fraction * slope_scale * h
        if self.prior is not None:
            cubic_sd = math.hypot(cubic_sd, self.prior.cubic_stderr_rad_per_hz3 * h**3)
        # The drift prior's width: the configured one, or four times it when the data's marginal
        # likelihood prefers that (a cavity drifting faster than assumed would otherwise be
        # explained away by a wrong slope).
        widths = (s_set.drift_prior_hz_per_s, _DRIFT_WIDENING * s_set.drift_prior_hz_per_s) if drift else (0.0,)
        fit = None
        for _ in range(3):
            d = detunings - centre
            design = np.stack([np.ones(len(points)), d, (d / h) ** 3, taus], axis=1)
            mean = np.array([phase_star, slope_prior[0] if slope_prior else 0.0, cubic_prior_mean, 0.0])
            best = None
            for width in widths:
                drift_sd = slope_scale * width
                prior_sd = np.array([_TWO_PI, slope_prior[1] if slope_prior else wide_slope,
                                     max(cubic_sd, 1e-12), max(drift_sd, 1e-15)])
                evidence = log_evidence(design, phases, variances, mean, prior_sd)
                if best is None or evidence > best[0] + 1e-9:
                    best = (evidence, prior_sd)
            theta, cov = solve_gaussian(design, phases, variances, mean, np.diag(1.0 / best[1] ** 2))
            fit = LockFit(velocity, centre, h, t_ref, theta, cov, len(points))
            if not fit.slope_known():
                break
            star, _, _ = fit.solve(phase_star, 0.0, t_ref, 4.0 * h)
            if abs(star - centre) < 1e-3 * h:
                break
            centre = star
        return fit

    def _phase_star(self) -> tuple[float, float]:
        """Posterior mean and standard deviation of the phase at the peak (rad)."""
        return self._cached("phase_star", self._compute_phase_star)

    def _compute_phase_star(self) -> tuple[float, float]:
        centre, width = self._phase_star_prior
        points = self._in_range()
        groups: dict[int, list[_Obs]] = {}
        for obs in points:
            key = int(round(math.log(obs.velocity) / _SAME_VELOCITY))
            groups.setdefault(key, []).append(obs)
        usable = [g for g in groups.values() if len(g) >= 2]
        if not usable:
            return centre, width
        grid = centre + width * np.linspace(-4.0, 4.0, _PHASE_GRID)
        log_post = -0.5 * ((grid - centre) / width) ** 2
        for group in usable:
            phases = np.array([self._unwrapped(o) for o in group])
            inversions = np.array([o.result.inversion for o in group])
            scale0 = max(float(np.max(inversions)), _MIN_INVERSION_SCALE)
            errors0 = phases - centre
            # The phase's own noise moves the cos law too (errors in the regressor).
            variances = (np.array([o.result.inversion_stderr for o in group]) ** 2
                         + (0.5 * scale0 * np.sin(0.5 * np.abs(errors0))) ** 2
                         * np.array([o.result.phase_shift_stderr for o in group]) ** 2)
            weights = 1.0 / np.maximum(variances, 1e-10)
            shape = np.cos(0.5 * (phases[None, :] - grid[:, None]))  # (grid, points)
            scale = (shape * weights * inversions).sum(axis=1) / np.maximum((shape**2 * weights).sum(axis=1), 1e-12)
            chi2 = ((inversions[None, :] - scale[:, None] * shape) ** 2 * weights).sum(axis=1)
            log_post = log_post - 0.5 * chi2
        post = np.exp(log_post - log_post.max())
        post /= post.sum()
        mean = float((grid * post).sum())
        sd = float(math.sqrt(max(((grid - mean) ** 2 * post).sum(), 1e-12)))
        return mean, sd

    # -- the absorption signal --------------------------------------------------------------

    def _anchor(self) -> _Obs | None:
        points = self._in_range()
        return points[0] if points else None

    def _absorption_points(self) -> list[_Obs]:
        window = self.settings.absorption_phase_window_rad
        star = self._phase_star()[0]
        return [o for o in self._in_range() if abs(self._unwrapped(o) - star) <= window]

    def _absorption_fit(self) -> AbsorptionFit | None:
        return self._cached("absorption", self._compute_absorption_fit)

    def _absorption_prior(self, velocity_ref: float) -> tuple[np.ndarray, np.ndarray] | None:
        if self.prior is None:
            return None
        p = self.prior
        # P = P_min + k (v*/v - 1)^2 in x = v_ref/v - 1: a2 = k / (1 + x*)^2, a1 = -2 a2 x*.
        x_star = velocity_ref / p.velocity_m_per_s - 1.0
        a2 = p.absorption_curvature / (1.0 + x_star) ** 2
        mean = np.array([p.absorption_min + a2 * x_star**2, -2.0 * a2 * x_star, a2])
        # The vertex is known to its stored error and may have moved by the tolerance; the
        # curvature to its error and 30 %.
        x_sd = math.hypot(p.velocity_stderr_m_per_s / p.velocity_m_per_s,
                          self.settings.prior_velocity_tolerance_fraction)
        a2_sd = math.hypot(p.absorption_curvature_stderr, 0.3 * p.absorption_curvature)
        sd = np.array([math.hypot(p.absorption_min_stderr, a2 * x_sd**2), 2.0 * a2 * x_sd, max(a2_sd, 1e-6)])
        return mean, np.diag(1.0 / sd**2)

    def _compute_absorption_fit(self) -> AbsorptionFit | None:
        anchor = self._anchor()
        if anchor is None:
            return None
        velocity_ref = self.prior.velocity_m_per_s if self.prior is not None else anchor.velocity
        points = self._absorption_points()
        xs = np.array([velocity_ref / o.velocity - 1.0 for o in points])
        groups: list[float] = []
        for x in sorted(xs.tolist()):
            if not groups or x - groups[-1] > _SAME_VELOCITY:
                groups.append(x)
        prior = self._absorption_prior(velocity_ref)
        if prior is None and len(groups) < 3:
            return AbsorptionFit(velocity_ref, np.zeros(3), np.eye(3), tuple(groups), False) if points else None
        values = np.array([o.result.absorption for o in points])
        variances = np.maximum(np.array([o.result.absorption_stderr for o in points]) ** 2, 1e-8)
        design = np.stack([np.ones(len(points)), xs, xs**2], axis=1) if points else np.zeros((0, 3))
        if prior is None:
            mean, precision = np.zeros(3), np.diag([1e-6, 1e-6, 1e-6])
        else:
            mean, precision = prior
        coef, cov = solve_gaussian(design, values, variances, mean, precision)
        return AbsorptionFit(velocity_ref, coef, cov, tuple(groups), prior is not None)

    def _absorption_ready(self, fit: AbsorptionFit | None) -> bool:
        return fit is not None and (fit.from_prior or len(fit.x_groups) >= 3)

    def _velocity_curve(self) -> InversionCurve | None:
        """The inversion along velocity (a calibration's; None before three velocities)."""
        return self._cached("velocity_curve", self._compute_velocity_curve)

    def _compute_velocity_curve(self) -> InversionCurve | None:
        fit = self._absorption_fit()
        if self.prior is not None or not self._absorption_ready(fit):
            return None
        # The search's own points: a verification measures the inversion at one velocity at
        # its own precision and moment; it judges the choice and does not move the model.
        points = [o for o in self._absorption_points() if o.purpose not in ("verify", "correct")]
        star = self._phase_star()[0]
        xs, values, variances = [], [], []
        for o in points:
            # The inversion at the peak's phase: a phase error eps costs a factor cos(eps / 2).
            half = 0.5 * (self._unwrapped(o) - star)
            factor = max(math.cos(half), 0.5)
            value = o.result.inversion / factor
            xs.append(fit.x_of(o.velocity))
            values.append(value)
            variances.append((o.result.inversion_stderr / factor) ** 2
                             + (value * 0.5 * math.tan(half) * o.result.phase_shift_stderr) ** 2)
        return fit_inversion_curve(
            xs, values, variances, [o.result.absorption for o in points],
            [o.result.absorption_stderr**2 for o in points],
            [o.result.contrast_empty for o in points],
            [o.result.contrast_empty_stderr**2 for o in points],
            fit.coef, fit.cov, self._inversion_scale(), fit.velocity_ref, fit.x_groups)

    @staticmethod
    def _vertex_velocity_stderr(fit: AbsorptionFit) -> float:
        """Standard error of the velocity of least absorption (delta method; inf without a vertex)."""
        vertex = fit.vertex()
        if vertex is None:
            return math.inf
        a1, a2 = float(fit.coef[1]), float(fit.coef[2])
        gradient = np.array([0.0, -1.0 / (2.0 * a2), a1 / (2.0 * a2**2)])
        x_sd = math.sqrt(max(float(gradient @ fit.cov @ gradient), 0.0))
        return fit.velocity_of(vertex) * x_sd / (1.0 + vertex)

    def _inversion_scale(self) -> float:
        points = self._absorption_points() or self._in_range()
        if not points:
            return 1.0
        values = np.array([o.result.inversion for o in points])
        weights = 1.0 / np.maximum(np.array([o.result.inversion_stderr for o in points]) ** 2, 1e-8)
        return max(float((values * weights).sum() / weights.sum()), _MIN_INVERSION_SCALE)

    def _box_x(self, fit: AbsorptionFit) -> tuple[float, float]:
        low, high = self._velocity_box
        return fit.x_of(high), fit.x_of(low)

    # -- the recommendation -----------------------------------------------------------------

    def _velocity_plan(self) -> dict[str, Any]:
        """Where the velocity stage stands: concluded?, the chosen velocity, the next velocity."""
        return self._cached("velocity_plan", self._compute_velocity_plan)

    def _compute_velocity_plan(self) -> dict[str, Any]:
        anchor = self._anchor()
        f = self.settings.velocity_step_fraction
        low, high = self._velocity_box
        if anchor is None:
            return {"concluded": False, "velocity": self.start["velocity"], "next": None, "note": "no lock yet"}
        fit = self._absorption_fit()
        attempts = [(o.velocity, self._range_note(o.result) is None) for o in self._obs if o.purpose == "velocity"]

        def was_tried(v: float) -> bool:
            # Out of the capture range there, or twice in range but outside the absorption
            # window (the lock does not settle at that velocity).
            same = [usable for t, usable in attempts if abs(t / v - 1.0) <= _SAME_VELOCITY]
            return (not all(same)) or len(same) >= 2 if same else False

        def known(v: float) -> bool:
            return fit is not None and any(abs(fit.x_of(v) - x) <= _SAME_VELOCITY for x in fit.x_groups)

        if self.prior is not None:
            # A retune starts from the stored absorption curve: concluded at the last good velocity
            # unless the data move the minimum.
            vertex = fit.vertex() if fit is not None else None
            if vertex is None:
                return {"concluded": True, "velocity": self.start["velocity"], "next": None,
                        "note": "stored absorption curve"}
            v = float(np.clip(fit.velocity_of(vertex), low, high))
            return {"concluded": True, "velocity": v, "next": None, "note": "stored absorption curve and the data"}

        v0 = anchor.velocity
        if not self._absorption_ready(fit):
            for candidate in (v0 * (1.0 - f), v0 * (1.0 + f), v0 * (1.0 - 2.0 * f), v0 * (1.0 + 2.0 * f)):
                v = float(np.clip(candidate, low, high))
                if known(v) or was_tried(v) or abs(v / v0 - 1.0) <= _SAME_VELOCITY:
                    continue
                return {"concluded": False, "velocity": v0, "next": v,
                        "note": "velocities around the lock for the absorption's curvature"}
            return {"concluded": True, "velocity": v0, "next": None,
                    "note": "no third usable velocity within the box: staying at the lock's velocity"}
        curve = self._velocity_curve()
        vertex = curve.vertex()
        x_lo, x_hi = min(curve.x_groups), max(curve.x_groups)
        if vertex is not None and x_lo < vertex < x_hi:
            return {"concluded": True, "velocity": curve.velocity_of(vertex), "next": None,
                    "note": "inversion optimum bracketed"}
        # Not bracketed: extend towards higher inversion.
        if vertex is not None:
            towards_high_x = vertex >= x_hi
        else:
            towards_high_x = curve.value(x_hi) > curve.value(x_lo)
        end_x = x_hi if towards_high_x else x_lo
        end_v = curve.velocity_of(end_x)
        candidate = end_v * (1.0 - f) if towards_high_x else end_v * (1.0 + f)
        v = float(np.clip(candidate, low, high))
        rising = "lower" if towards_high_x else "higher"
        # The data point outward when the inversion's slope at the last velocity, outward,
        # is two standard errors above zero; otherwise the edge may be the flat top itself and
        # the bound decides.
        gradient = np.array([0.0, 1.0, 2.0 * end_x])
        slope = float(gradient @ curve.coef) * (1.0 if towards_high_x else -1.0)
        outward = slope > 2.0 * math.sqrt(max(float(gradient @ curve.cov @ gradient), 0.0))
        pointing = f"the inversion rising towards {rising} velocities" if outward else \
            f"no significant slope towards {rising} velocities"
        if abs(v / end_v - 1.0) <= _SAME_VELOCITY:
            return {"concluded": True, "velocity": end_v, "next": None, "bracketed": False,
                    "outward": outward,
                    "note": f"inversion optimum not bracketed: at the box edge {end_v:.1f} m/s with {pointing}"}
        if was_tried(v):
            return {"concluded": True, "velocity": end_v, "next": None, "bracketed": False,
                    "outward": outward,
                    "note": f"inversion optimum not bracketed: no usable signal at {v:.1f} m/s, "
                            f"stopped at {end_v:.1f} m/s with {pointing}"}
        return {"concluded": False, "velocity": end_v, "next": v,
                "note": "inversion optimum not bracketed: extending towards higher inversion"}

    def _recommended_velocity(self) -> float:
        return float(self._velocity_plan()["velocity"])

    def _lock_target(self, velocity: float, clock: float | None) -> tuple[float, float] | None:
        """(delta*, stderr) at ``velocity`` and ``clock`` from the lock, or None without a slope."""
        fit = self._lock_fit(velocity)
        if fit is None or not fit.slope_known():
            return None
        star, star_sd = self._phase_star()
        delta, sd, _ = fit.solve(star, star_sd**2, clock, 4.0 * self.step_hz)
        return delta, sd

    def _clip_detuning(self, detuning: float) -> float:
        return float(np.clip(detuning, *self._detuning_box))

    def _limit_step(self, detuning: float, velocity: float) -> float:
        """Keep a lock step within ``max_lock_step_hz`` of the nearest usable point."""
        near = [o.detuning for o in self._in_range() if abs(o.velocity / velocity - 1.0) <= 2 * self.settings.velocity_step_fraction]
        if not near:
            near = [o.detuning for o in self._in_range()]
        if near:
            nearest = min(near, key=lambda d: abs(d - detuning))
            detuning = float(np.clip(detuning, nearest - self.max_lock_step_hz, nearest + self.max_lock_step_hz))
        return self._clip_detuning(detuning)

    def _gp_search(self) -> BayesianSearch:
        if self._gp is None:
            self._gp = BayesianSearch(self.space, seed=self.seed, initial_points=[self.start],
                                      n_initial_points=self.settings.fallback_initial_points)
        while self._gp_told < len(self._obs):
            obs = self._obs[self._gp_told]
            self._gp.tell({"velocity": obs.velocity, "detuning": obs.detuning}, obs.result.inversion,
                          obs.result.inversion_stderr)
            self._gp_told += 1
        return self._gp

    def recommend(self, *, clock_s: float | None = None) -> Recommendation:
        """The set-points to choose at rig clock ``clock_s`` and the predicted inversion.

        ``clock_s`` is when the set-points will be used: pass the middle of the verification
        (now plus half its duration) so that the lock's drift term leads a drifting cavity.

        With a lock: the velocity of least absorption (or the lock's velocity until it is
        known) and the locked detuning there at ``clock_s``; the value is the inversion scale
        times one minus the predicted shortfall. Without: the Gaussian process's
        recommendation (the start before any result).
        """
        clock = self._now(clock_s)
        anchor = self._anchor()
        if anchor is None:
            if not self._obs:
                return Recommendation(dict(self.start), math.nan, math.inf)
            return self._gp_search().recommend(clock_s=None)
        velocity = self._recommended_velocity()
        target = self._lock_target(velocity, clock)
        if target is None:
            best = min(self._in_range(), key=lambda o: abs(self._phase_error(o.result)))
            point = {"velocity": velocity, "detuning": best.detuning}
        else:
            point = {"velocity": velocity, "detuning": self._clip_detuning(target[0])}
        point = self.space.clip(point)
        scale = self._inversion_scale()
        short = self._shortfall_at(point, clock)
        value = scale * (1.0 - short.estimate) if math.isfinite(short.estimate) else scale
        # An approximate standard error: the shortfall's one-sided bound over its normal quantile.
        z = float(special.ndtri(self.settings.confidence))
        stderr = scale * max(short.upper - short.estimate, 0.0) / z if math.isfinite(short.upper) else math.inf
        return Recommendation({k: float(point[k]) for k in self.space.names}, float(value), float(stderr))

    # -- the shortfall ----------------------------------------------------------------------

    def _detuning_terms(self, point: Mapping[str, float], clock: float | None) -> tuple[float, float] | None:
        """Posterior mean and sd of the phase error at ``point`` (rad), or None without a slope."""
        fit = self._lock_fit(point["velocity"])
        if fit is None or not fit.slope_known():
            return None
        star, star_sd = self._phase_star()
        mean, var = fit.phase(point["detuning"], clock)
        return mean - star, math.sqrt(var + star_sd**2)

    def _velocity_draws(self, fit: AbsorptionFit, cov: np.ndarray, velocity: float,
                        normals: np.ndarray, scale: float) -> np.ndarray:
        draws = fit.coef[None, :] + normals @ cholesky_jittered(cov).T
        x_rec = fit.x_of(velocity)
        x_lo, x_hi = self._box_x(fit)
        a0, a1, a2 = draws[:, 0], draws[:, 1], draws[:, 2]
        with np.errstate(divide="ignore", invalid="ignore"):
            vertex = np.where(a2 > 0.0, -a1 / (2.0 * a2), np.nan)
        value_lo = a0 + a1 * x_lo + a2 * x_lo**2
        value_hi = a0 + a1 * x_hi + a2 * x_hi**2
        edge_min = np.minimum(value_lo, value_hi)
        inside = np.clip(np.nan_to_num(vertex, nan=x_lo), x_lo, x_hi)
        vertex_min = np.where(a2 > 0.0, a0 + a1 * inside + a2 * inside**2, edge_min)
        least = np.minimum(vertex_min, edge_min)
        at_rec = a0 + a1 * x_rec + a2 * x_rec**2
        return np.maximum(at_rec - least, 0.0) / scale

    def _inherited_draws(self, count: int) -> tuple[np.ndarray, float]:
        return inherited_draws(self, count)

    def _curve_range(self, curve: InversionCurve) -> tuple[float, float]:
        """The ``x`` range the inversion curve is trusted over: the velocities measured and one
        velocity step beyond (a quadratic is not extrapolated further). Not clipped to the box:
        the shortfall is below the rig's best, and a choice at the box edge must count what
        the curve says lies just outside it."""
        f = self.settings.velocity_step_fraction
        return (min(curve.x_groups) - f, max(curve.x_groups) + f)

    def _curve_draws(self, curve: InversionCurve, velocity: float, normals: np.ndarray, scale: float,
                     residual_cov: np.ndarray | None = None,
                     absorption_cov: np.ndarray | None = None) -> tuple[np.ndarray, float]:
        """Relative inversion lost at ``velocity`` against the best within the trusted range:
        posterior draws and the value at the posterior mean."""
        x_lo, x_hi = self._curve_range(curve)
        x_rec = float(np.clip(curve.x_of(velocity), x_lo, x_hi))

        def loss(b: np.ndarray) -> np.ndarray:
            b0, b1, b2 = b[:, 0], b[:, 1], b[:, 2]
            with np.errstate(divide="ignore", invalid="ignore"):
                vertex = np.where(b2 < 0.0, -b1 / (2.0 * b2), x_lo)
            inside = np.clip(np.nan_to_num(vertex, nan=x_lo), x_lo, x_hi)
            best = np.maximum.reduce([b0 + b1 * x + b2 * x**2 for x in (x_lo, x_hi)]
                                     + [np.where(b2 < 0.0, b0 + b1 * inside + b2 * inside**2, -np.inf)])
            return np.maximum(best - (b0 + b1 * x_rec + b2 * x_rec**2), 0.0) / scale

        draws = loss(curve.draws(normals, residual_cov, absorption_cov))
        return draws, float(loss(curve.coef[None, :])[0])

    def _shortfall_at(self, point: Mapping[str, float], clock: float | None,
                      lock_cov: np.ndarray | None = None, absorption_cov: np.ndarray | None = None,
                      residual_cov: np.ndarray | None = None,
                      phase_error: tuple[float, float] | None = None, inherit: bool = True) -> Shortfall:
        s = self.settings
        q = s.confidence
        detuning = self._detuning_terms(point, clock) if phase_error is None else phase_error
        if lock_cov is not None and detuning is not None:
            fit = self._lock_fit(point["velocity"])
            x = fit.features(point["detuning"], clock)
            detuning = (detuning[0], math.sqrt(max(float(x @ lock_cov @ x), 0.0) + self._phase_star()[1] ** 2))
        normals = self._draw_normals(4, 11)
        notes = []
        if detuning is None:
            d_draws = np.full(len(normals), math.inf)
            d_point = d_upper = math.inf
            mu, sigma = math.nan, math.inf
            notes.append("no phase slope yet")
        else:
            mu, sigma = detuning
            eps = mu + sigma * normals[:, 0]
            d_draws = 1.0 - np.cos(0.5 * eps)
            d_point = 1.0 - math.cos(0.5 * mu)
            eps2 = sigma**2 * float(stats.ncx2.ppf(q, 1, (mu / sigma) ** 2)) if sigma > 0 else mu**2
            d_upper = 1.0 - math.cos(0.5 * min(math.sqrt(eps2), math.pi))
        fit = self._absorption_fit()
        plan = self._velocity_plan()
        curve = self._velocity_curve()
        if curve is not None and plan["concluded"]:
            # A calibration: the inversion along velocity, the physics as its prior.
            scale = self._inversion_scale()
            v_draws, v_point = self._curve_draws(curve, point["velocity"], normals[:, 1:], scale,
                                                 residual_cov, absorption_cov)
            v_upper = float(np.quantile(v_draws, q))
        elif self._absorption_ready(fit) and self.prior is not None:
            # A retune: the excess absorption over the stored curve around the last good velocity.
            scale = self._inversion_scale()
            cov = fit.cov if absorption_cov is None else absorption_cov
            v_draws = self._velocity_draws(fit, cov, point["velocity"], normals[:, 1:], scale)
            x_lo, x_hi = self._box_x(fit)
            vertex = fit.vertex()
            x_rec = fit.x_of(point["velocity"])
            least = fit.value(float(np.clip(vertex, x_lo, x_hi))) if vertex is not None else min(
                fit.value(x_lo), fit.value(x_hi))
            v_point = max(fit.value(x_rec) - least, 0.0) / scale
            if inherit:
                # The calibration's own uncertainty of the velocity the retune keeps.
                inherited, inherited_point = self._inherited_draws(len(v_draws))
                v_draws = v_draws + inherited
                v_point += inherited_point
            v_upper = float(np.quantile(v_draws, q))
        else:
            v_draws = np.full(len(normals), math.inf)
            v_point = v_upper = math.inf
            notes.append("velocity model not established yet")
        total = d_draws + v_draws
        upper = float(np.quantile(total, q)) if np.all(np.isfinite(total)) else math.inf
        return Shortfall(estimate=d_point + v_point, upper=upper, detuning=d_point, detuning_upper=d_upper,
                         velocity=v_point, velocity_upper=v_upper, phase_error_rad=mu,
                         phase_error_stderr_rad=sigma, confidence=q, note="; ".join(notes))

    def shortfall(self, *, clock_s: float | None = None,
                  point: Mapping[str, float] | None = None) -> Shortfall:
        """Predicted shortfall below the best at ``clock_s`` of ``point`` (default:
        :meth:`recommend`'s set-points)."""
        clock = self._now(clock_s)
        if self._anchor() is None:
            return Shortfall(math.inf, math.inf, math.inf, math.inf, math.inf, math.inf, math.nan, math.inf,
                             self.settings.confidence, "no point in the capture range yet")
        if point is None:
            point = self.recommend(clock_s=clock).point
        else:
            point = self.space.clip({k: float(point[k]) for k in self.space.names})
        # The posterior with every result told (a verification's included, at its precision):
        # its own phase alone would throw away what the lock points already said.
        return self._shortfall_at(point, clock)

    def acceptance_problems(self, point: Mapping[str, float], *, clock_s: float | None = None,
                            max_shortfall: float | None = None) -> list[tuple[str, str]]:
        """Why this search cannot vouch for ``point``: ``(problem, what to check)`` pairs.

        Empty when the detuning lock and the velocity model are established, the velocity
        optimum is bracketed inside the box, the lock's peak detuning lies inside the box, and
        the upper bound of the predicted shortfall at ``point`` (at ``confidence``, every
        observation so far included) is within ``max_shortfall`` (default
        ``target_shortfall``).
        """
        clock = self._now(clock_s)
        s = self.settings
        target = s.target_shortfall if max_shortfall is None else float(max_shortfall)
        nominal = "[nominal] coupling_hz and waist_m and their units (Hz, m)"
        if self._anchor() is None:
            return [("the phase lock was never established (no point in its capture range)",
                     f"the search box (it must hold the 2 pi point), {nominal}")]
        problems: list[tuple[str, str]] = []
        velocity = float(point["velocity"])
        fit = self._lock_fit(velocity)
        if fit is None or not fit.slope_known():
            problems.append(("the detuning lock was not established (no significant phase slope)",
                             f"the detuning box and {nominal}"))
        else:
            star, star_sd = self._phase_star()
            centre, centre_sd, _ = fit.solve(star, star_sd**2, clock, math.inf)
            low, high = self._detuning_box
            if centre < low - 2.0 * centre_sd or centre > high + 2.0 * centre_sd:
                problems.append((f"the lock's peak detuning {centre / 1e3:+.2f} kHz lies outside the "
                                 f"detuning box [{low / 1e3:+.1f}, {high / 1e3:+.1f}] kHz",
                                 "[setpoints.detuning] search_min and search_max (Hz)"))
        plan = self._velocity_plan()
        if not plan["concluded"] or not self._absorption_ready(self._absorption_fit()):
            problems.append(("the velocity model was not established "
                             f"({plan['note']})", f"the velocity box and {nominal}"))
        elif plan.get("outward", False):
            problems.append((f"the velocity optimum is not bracketed inside the box ({plan['note']})",
                             f"[setpoints.velocity] search_min and search_max (m/s) and {nominal}"))
        short = self.shortfall(clock_s=clock, point=point)
        if not problems and not short.upper <= target:
            problems.append((f"the predicted shortfall's {s.confidence:.0%} bound {short.upper:.2%} is "
                             f"above the target {target:.1%}",
                             f"the point budget, the box, and {nominal}"))
        return problems

    def converged(self, *, clock_s: float | None = None) -> bool:
        """True when the upper bound of the predicted shortfall is below ``target_shortfall``.

        A retune's bound is taken without the calibration's velocity term it inherits
        (``LockPrior.velocity_shortfall``): its points cannot lower that term, and its
        acceptance, against ``[acceptance] max_shortfall``, counts it. Also requires the last usable point to lie at the recommended velocity (within 2 %):
        the last step re-centres the lock there from fresh data.
        """
        clock = self._now(clock_s)
        points = self._in_range()
        plan = self._velocity_plan()
        if not points or not plan["concluded"] or plan.get("outward", False):
            return False
        velocity = self._recommended_velocity()
        if not self._measured_at(velocity):
            return False
        rec = self.recommend(clock_s=clock).point
        return self._stop_bound(rec, clock) <= self.settings.target_shortfall

    def _stop_bound(self, rec: Mapping[str, float], clock: float | None) -> float:
        """The bound the stop compares with the target at ``rec``: without the calibration's
        velocity term that a retune inherits (its points cannot lower it; the acceptance and
        every reported bound count it)."""
        return self._shortfall_at(rec, clock, inherit=False).upper

    def best_inversion(self) -> tuple[float, float] | None:
        """The highest inversion the velocity curve expects within its trusted range: (value at
        the posterior mean, upper bound at the two-sided level of ``confidence`` from the seeded
        posterior draws);
        None before the curve exists or while its optimum is not bracketed (it may lie beyond)."""
        return self._cached("best_inversion", self._compute_best_inversion)

    def _compute_best_inversion(self) -> tuple[float, float] | None:
        curve = self._velocity_curve()
        plan = self._velocity_plan()
        if curve is None or not plan["concluded"] or plan.get("outward", False):
            return None
        x_lo, x_hi = self._curve_range(curve)

        def best(b: np.ndarray) -> np.ndarray:
            b0, b1, b2 = b[:, 0], b[:, 1], b[:, 2]
            with np.errstate(divide="ignore", invalid="ignore"):
                vertex = np.where(b2 < 0.0, -b1 / (2.0 * b2), x_lo)
            inside = np.clip(np.nan_to_num(vertex, nan=x_lo), x_lo, x_hi)
            return np.maximum.reduce([b0 + b1 * x + b2 * x**2 for x in (x_lo, x_hi)]
                                     + [b0 + b1 * inside + b2 * inside**2])

        draws = best(curve.draws(self._draw_normals(3, 7)))
        # Two-sided level: the check is made after every point, as the verification's first look.
        level = 1.0 - 0.5 * (1.0 - self.settings.confidence)
        return float(best(curve.coef[None, :])[0]), float(np.quantile(draws, level))

    def hopeless(self, *, clock_s: float | None = None, points_left: int | None = None,
                 acceptance_bar: float | None = None, min_inversion: float | None = None) -> str | None:
        """Why more points in this box cannot meet the target, or None.

        Said when the velocity optimum lies beyond the box (the data point outward at its
        edge), or when the velocity stage ended without three usable velocities (no velocity
        model, an infinite bound): the loop should stop and verify, and the stage is then not
        accepted. With
        ``points_left`` (the point budget left), also when the bound already meets
        ``acceptance_bar`` (default ``still_good_shortfall``) and its expected fall per point
        (the best next point's, a linear-Gaussian update) would need more points than are left
        to reach the stricter target, as where the optimum sits at a box edge and the curve
        beyond it cannot be measured: the loop should stop and verify. Not above the bar: there
        the posterior's mean still moves as the data come in (a bound of 3.4 % expected to fall
        by 0.07 % per point fell to 1.1 % in four), and the points are the stage's only hope.
        """
        clock = self._now(clock_s)
        no_lock = self._lock_not_established()
        if no_lock is not None:
            return no_lock
        best = self.best_inversion() if min_inversion is not None else None
        if best is not None and best[1] < min_inversion:
            # No point in this box can reach the acceptance's inversion: the rig, not the search.
            level = 1.0 - 0.5 * (1.0 - self.settings.confidence)
            return (f"the highest inversion in the box is {best[0]:.3f} (at most {best[1]:.3f} at "
                    f"{level:.1%}), below [acceptance] min_inversion {min_inversion:.3f} "
                    "(check the one-photon source, the detectors and [acceptance] min_inversion)")
        plan = self._velocity_plan()
        if plan["concluded"] and plan.get("outward", False):
            return f"velocity optimum not bracketed inside the box: {plan['note']}"
        if plan["concluded"] and self._anchor() is not None and not self._absorption_ready(self._absorption_fit()):
            # The velocity stage found no third usable velocity: the bound stays infinite, no
            # point's expected gain can be told apart, and the stage cannot be accepted.
            return f"the velocity model cannot be established in this box: {plan['note']}"
        if points_left is None or not plan["concluded"] or self._anchor() is None:
            return None
        velocity = float(plan["velocity"])
        fit = self._lock_fit(velocity)
        if fit is None or not fit.slope_known():
            return None
        now, after = expected_fall(self, velocity, clock)
        target = self.settings.target_shortfall
        bar = self.settings.still_good_shortfall if acceptance_bar is None else float(acceptance_bar)
        if not math.isfinite(now) or now <= target or now > bar:
            return None
        fall = now - after
        if fall > 0.0 and (now - target) / fall <= points_left:
            return None
        needed = "no point lowers it" if fall <= 0.0 else \
            f"{math.ceil((now - target) / fall)} points at {fall:.2%} each"
        return (f"the target {target:.1%} is out of reach within the point budget: the bound {now:.2%} "
                f"(within the acceptance bar {bar:.1%}) would need {needed}, more than the "
                f"{points_left} left")

    def _lock_not_established(self) -> str | None:
        """Why the detuning lock is not established after twice the fallback's first design,
        or None (established, a retune with its stored slope, or fewer points so far).

        A one-photon source prepared with a probability near 0.5 mixes the inverted one-photon
        fringe with the empty one: near the best the one-photon contrast falls to about
        ``2 p1 - 1`` of the empty one, below ``min_contrast_ratio`` wherever the inversion is
        high, and no point there steers the lock. More points of the fallback's search do not
        change that; the stage should stop and say what to check.
        """
        s = self.settings
        if self.prior is not None or len(self._obs) < 2 * s.fallback_initial_points:
            return None
        anchor = self._anchor()
        if anchor is not None:
            fit = self._lock_fit(anchor.velocity)
            if fit is not None and fit.slope_known():
                return None
        notes = [self._range_note(o.result) or "" for o in self._obs]
        low = sum(n.startswith("one-photon/empty contrast") for n in notes)
        wrapped = sum(n.startswith("phase error") for n in notes)
        unidentified = sum(n == "fringes not identified" for n in notes)
        if low >= max(wrapped, unidentified):
            cause = (f"the one-photon contrast was below {s.min_contrast_ratio:.2f} of the empty one at "
                     f"{low} of {len(notes)} points (check the one-photon source's preparation probability "
                     "and thermal photons, then [nominal] coupling_hz and waist_m)")
        elif wrapped >= unidentified:
            cause = (f"the phase error was beyond the capture range at {wrapped} of {len(notes)} points "
                     "(check the detuning box, [nominal] coupling_hz and waist_m, their units)")
        else:
            cause = (f"no fringe was identified at {unidentified} of {len(notes)} points (check the atom "
                     "rate, the detectors and the Ramsey phases)")
        return f"the detuning lock is not established after {len(notes)} points: {cause}"

    def _measured_at(self, velocity: float) -> bool:
        """The last usable point lies at ``velocity`` (within ``_AT_VELOCITY``): fresh lock data there."""
        points = self._in_range()
        return bool(points) and abs(points[-1].velocity / velocity - 1.0) <= _AT_VELOCITY

    # -- proposals --------------------------------------------------------------------------

    def step_shots(self, purpose: str) -> int:
        """Shots per field and phase of a lock (``"lock"``, ``"relock"``) or velocity step.

        Sized from the measured error per shot of the usable points so far (median of
        ``stderr^2 x shots``: the one-photon contrast, the atom rate and the detection
        efficiency are all in it) to give ``step_phase_stderr_rad`` (lock) or
        ``step_absorption_stderr`` (velocity), within ``step_shots_range`` times the configured
        shots; the configured shots before any usable point.
        """
        s = self.settings
        base = s.velocity_shots_per_phase if purpose == "velocity" else s.lock_shots_per_phase
        return self._cached(("step_shots", purpose), lambda: self._compute_step_shots(purpose, base))

    def _compute_step_shots(self, purpose: str, base: int) -> int:
        s = self.settings
        points = [o for o in self._in_range() if o.result.shots > 0]
        if not points:
            return base
        if purpose == "velocity":
            floor = 0.005
            per_shot = float(np.median([o.result.absorption_stderr**2 * o.result.shots / max(o.result.absorption, floor)
                                        for o in points]))
            level = max(float(np.median([o.result.absorption for o in points])), floor)
            total = per_shot * level / s.step_absorption_stderr**2
        else:
            per_shot = float(np.median([o.result.phase_shift_stderr**2 * o.result.shots for o in points]))
            total = per_shot / s.step_phase_stderr_rad**2
        per_phase = math.ceil(total / measurement_shots(s.ramsey_phases, 1))
        low, high = s.step_shots_range
        return int(np.clip(per_phase, max(1, math.ceil(low * base)), max(1, math.floor(high * base))))

    def _total_shots(self, shots_per_phase: int) -> int:
        return measurement_shots(self.settings.ramsey_phases, shots_per_phase)

    def propose(self, *, clock_s: float | None = None) -> Proposal:
        """The next point to measure, its purpose, its shots and the reason (see the module notes).

        The same proposal for the same ``clock_s`` until the next :meth:`observe`.
        """
        clock = self._now(clock_s)
        return self._cached(("propose", clock), lambda: self._compute_proposal(clock))

    def _compute_proposal(self, clock: float | None) -> Proposal:
        s = self.settings
        if self.prior is not None and not any(o.purpose == "check" for o in self._obs):
            return Proposal(dict(self.start), "check", None,
                            "retune: check the last good set-points "
                            f"({self.start['velocity']:.1f} m/s, {self.start['detuning'] / 1e3:+.2f} kHz) "
                            "against the stored lock")
        if self.prior is not None and self._obs and self._obs[-1].purpose == "check":
            verdict = self.verdict(clock_s=clock)
            if not verdict.still_good and verdict.corrected is not None:
                # Verify the corrected set-points directly only when the stored slope predicts
                # them well enough; otherwise one cheap lock step there first.
                short = self._shortfall_at(verdict.corrected, clock, inherit=False)
                if short.upper <= s.target_shortfall:
                    return Proposal(verdict.corrected, "correct", None,
                                    f"retune: {verdict.reason}; predicted bound there {short.upper:.2%}: verify")
                return Proposal(verdict.corrected, "lock", self.step_shots("lock"),
                                f"retune: {verdict.reason}; predicted bound there {short.upper:.2%} above "
                                f"{s.target_shortfall:.1%}: a lock step there first")
        if not self._obs:
            return Proposal(dict(self.start), "lock", s.lock_shots_per_phase,
                            f"start of the lock at {self.start['velocity']:.1f} m/s, "
                            f"{self.start['detuning'] / 1e3:+.2f} kHz: its phase shift says how far the peak is")
        anchor = self._anchor()
        if anchor is None:
            return self._fallback_proposal()
        plan = self._velocity_plan()
        velocity = anchor.velocity if not plan["concluded"] else float(plan["velocity"])
        fit = self._lock_fit(velocity)
        if fit is None or not fit.slope_known():
            return self._bracket_proposal(velocity)
        if not plan["concluded"]:
            short = self._shortfall_at({"velocity": velocity, "detuning": self._lock_target(velocity, clock)[0]}, clock)
            if short.detuning_upper > s.lock_acquired_shortfall:
                return self._lock_proposal(velocity, clock, "lock", short,
                                           f"acquire the lock (detuning term's bound {short.detuning_upper:.1%} "
                                           f"above {s.lock_acquired_shortfall:.1%})")
            return self._velocity_proposal(float(plan["next"]), velocity, clock, plan["note"])
        if not self._measured_at(velocity):
            short = self._shortfall_at({"velocity": velocity,
                                        "detuning": self._lock_target(velocity, clock)[0]}, clock)
            # Re-centre the lock at the chosen velocity once the bound allows a stop: before
            # that, the point that lowers the bound most per shot (a lock point there among them).
            rec = {"velocity": velocity, "detuning": self._clip_detuning(self._lock_target(velocity, clock)[0])}
            if self._stop_bound(rec, clock) <= s.target_shortfall or self.hopeless(clock_s=clock) is not None:
                return self._lock_proposal(velocity, clock, "relock", short,
                                           f"re-centre the lock at the chosen velocity ({plan['note']})")
        return self._best_proposal(velocity, clock)

    def _fallback_proposal(self) -> Proposal:
        gp = self._gp_search()
        last = self._obs[-1]
        note = self._range_note(last.result) or "no usable point"
        point = gp.ask()
        return Proposal(point, "search", None,
                        f"no point in the capture range yet (last: {note}): Gaussian-process search on "
                        f"the inversion, point {len(self._obs) + 1}")

    def _bracket_proposal(self, velocity: float) -> Proposal:
        s = self.settings
        near = [o for o in self._in_range() if abs(o.velocity / velocity - 1.0) <= _SAME_VELOCITY]
        if not near:
            near = self._in_range()
        ref = min(near, key=lambda o: abs(self._phase_error(o.result)))
        error = self._phase_error(ref.result)
        sign = s.slope_sign
        if self.prior is not None:
            sign = 1 if self.prior.slope_rad_per_hz > 0 else -1
        if sign != 0 and error != 0.0:
            direction = -1.0 if error * sign > 0 else 1.0
            why = f"phase error {error / math.pi:+.2f} pi with a slope of sign {sign:+d}"
        else:
            centre = 0.5 * sum(self._detuning_box)
            direction = 1.0 if centre >= ref.detuning else -1.0
            why = "slope sign unknown: towards the box centre"
        measured = [o.detuning for o in self._obs if abs(o.velocity / velocity - 1.0) <= _SAME_VELOCITY]
        for steps in (direction, -direction, 2.0 * direction, -2.0 * direction):
            target = self._clip_detuning(ref.detuning + steps * self.step_hz)
            if abs(target - ref.detuning) < 0.25 * self.step_hz:
                continue
            if any(abs(d - target) < 0.25 * self.step_hz for d in measured):
                continue
            if steps != direction:
                why += "; the slope is not yet significant from the points so far"
            return Proposal({"velocity": velocity, "detuning": target}, "lock", self.step_shots("lock"),
                            f"bracket the lock: {abs(steps):.0f} step(s) of {self.step_hz / 1e3:.1f} kHz from "
                            f"{ref.detuning / 1e3:+.2f} kHz (phase error {error / math.pi:+.2f} pi; {why}) for "
                            "the phase slope; the detuning term is unknown (infinite) until the slope's sign "
                            "is established")
        return self._fallback_proposal()

    def _lock_proposal(self, velocity: float, clock: float | None, purpose: str, short: Shortfall,
                       why: str) -> Proposal:
        s = self.settings
        delta, sd = self._lock_target(velocity, clock)
        target = self._limit_step(delta, velocity)
        limited = "" if abs(target - self._clip_detuning(delta)) < 1.0 else \
            f", step limited to {self.max_lock_step_hz / 1e3:.1f} kHz"
        rec = {"velocity": velocity, "detuning": self._clip_detuning(delta)}
        after = self._expected_after(rec, velocity, target, self.step_shots(purpose), clock)
        return Proposal({"velocity": velocity, "detuning": target}, purpose, self.step_shots(purpose),
                        f"{why}: phase at the peak predicted at {delta / 1e3:+.2f} +- {sd / 1e3:.2f} kHz{limited}; "
                        f"phase error there {short.phase_error_rad / math.pi:+.3f} +- "
                        f"{short.phase_error_stderr_rad / math.pi:.3f} pi; this point is expected to reduce the "
                        f"detuning term's {s.confidence:.0%} bound from {short.detuning_upper:.2%} to "
                        f"{after.detuning_upper:.2%}")

    def _velocity_proposal(self, velocity: float, lock_velocity: float, clock: float | None,
                           note: str) -> Proposal:
        # The lock at the lock's velocity: at the resonance the phase is that of the peak for
        # every velocity class (a real amplitude), so the locked detuning carries over.
        target = self._lock_target(lock_velocity, clock)
        detuning = self._limit_step(target[0], velocity) if target is not None else self._anchor().detuning
        groups = len(self._absorption_fit().x_groups) if self._absorption_fit() is not None else 0
        return Proposal({"velocity": velocity, "detuning": detuning}, "velocity", self.step_shots("velocity"),
                        f"{note}: absorption at {velocity:.1f} m/s, at the locked detuning "
                        f"{detuning / 1e3:+.2f} kHz; the velocity term is unknown (infinite) until the "
                        f"least absorption is bracketed ({groups} usable velocities so far)")

    def _expected_after(self, rec: Mapping[str, float], velocity: float, detuning: float,
                        shots_per_phase: int, clock: float | None, inherit: bool = True) -> Shortfall:
        return expected_after(self, rec, velocity, detuning, shots_per_phase, clock, inherit)

    def expected_after(self, point: Mapping[str, float], shots_per_phase: int, *,
                       clock_s: float | None = None) -> Shortfall:
        """The shortfall at ``point`` expected after ``shots_per_phase`` more shots there (a
        linear-Gaussian update: the covariance is known before the measurement, the means are
        kept), every term included."""
        clock = self._now(clock_s)
        return expected_after(self, point, float(point["velocity"]), float(point["detuning"]),
                              int(shots_per_phase), clock, True)

    def _best_proposal(self, velocity: float, clock: float | None) -> Proposal:
        return best_proposal(self, velocity, clock)

    # -- after the verification -------------------------------------------------------------

    def _phase_error_test(self, obs: _Obs, clock: float | None) -> tuple[float, float, float, float]:
        """(phase error, its sd, probability that the shortfall is within the target, local slope).

        The verification's own phase error, carried from the middle of the verification to
        ``clock`` by the lock's drift term (with that term's uncertainty), and with the
        uncertainty of the phase at the peak.
        """
        star, star_sd = self._phase_star()
        error = self._unwrapped(obs) - star
        variance = obs.result.phase_shift_stderr**2 + star_sd**2
        slope = math.nan
        fit = self._lock_fit(obs.velocity)
        if fit is not None and fit.slope_known():
            slope = fit.slope
            if fit.t_ref is not None and clock is not None and obs.result.clock_s is not None:
                elapsed = clock - obs.result.clock_s
                error += float(fit.theta[3]) * elapsed
                variance += float(fit.cov[3, 3]) * elapsed**2
        sd = math.sqrt(variance)
        limit = 2.0 * math.acos(1.0 - self.settings.target_shortfall)
        probability = float(special.ndtr((limit - error) / sd) - special.ndtr((-limit - error) / sd))
        return error, sd, probability, slope

    def correction(self, *, clock_s: float | None = None) -> Proposal | None:
        """A corrected point when the last verification's own phase shows too large a shortfall.

        Looks at the last observation if its purpose is ``"verify"`` or ``"correct"``. Its own
        phase error, carried to ``clock_s`` by the lock's drift term (with the uncertainties of
        that term and of the phase at the peak), gives the probability that the detuning
        shortfall ``1 - cos(eps / 2)`` is within ``target_shortfall``; when it is below
        ``1 - confidence``, returns the verified set-points with the detuning moved by
        ``-eps / slope`` (the lock's slope there; at most ``max_lock_step_hz``), purpose
        ``"correct"``, shots None (verification precision). Otherwise, or when the verification
        is out of the capture range (its phase says nothing then) or no slope is known, None.
        """
        clock = self._now(clock_s)
        if not self._obs or self._obs[-1].purpose not in ("verify", "correct"):
            return None
        last = self._obs[-1]
        if self._range_note(last.result) is not None:
            return None
        error, sd, probability, slope = self._phase_error_test(last, clock)
        if probability >= 1.0 - self.settings.confidence or not math.isfinite(slope):
            return None
        # The verification's own phase is the most precise word on where the peak is now.
        move = float(np.clip(-error / slope, -self.max_lock_step_hz, self.max_lock_step_hz))
        detuning = self._clip_detuning(last.detuning + move)
        return Proposal({"velocity": last.velocity, "detuning": detuning}, "correct", None,
                        f"verification's phase error {error / math.pi:+.3f} +- {sd / math.pi:.3f} pi: "
                        f"probability {probability:.1%} that its detuning shortfall is within "
                        f"{self.settings.target_shortfall:.1%}; lock moves the detuning by "
                        f"{(detuning - last.detuning) / 1e3:+.2f} kHz to {detuning / 1e3:+.2f} kHz")

    # -- retune ------------------------------------------------------------------------------

    def verdict(self, *, clock_s: float | None = None) -> Verdict:
        """Judge the last good set-points from the retune's check (the first ``"check"`` result).

        See :func:`autotune.analysis.retune_verdict.retune_verdict`.
        """
        return retune_verdict(self, clock_s=clock_s)

    # -- what was learned ---------------------------------------------------------------------

    def learned_prior(self, *, clock_s: float | None = None) -> LockPrior | None:
        """What this search learned, for the next retune (None until lock and velocity are known)."""
        clock = self._now(clock_s)
        fit_abs = self._absorption_fit()
        plan = self._velocity_plan()
        if self._anchor() is None or not self._absorption_ready(fit_abs) or not plan["concluded"]:
            return None
        rec = self.recommend(clock_s=clock).point
        lock = self._lock_fit(rec["velocity"])
        if lock is None or not lock.slope_known():
            return None
        star, star_sd = self._phase_star()
        h = lock.step_hz
        curve = self._velocity_curve()
        vertex = fit_abs.vertex()
        x_lo, x_hi = self._box_x(fit_abs)
        if curve is not None:
            # The retune's reference is the chosen velocity (the inversion's optimum), with the
            # absorption there as its stored "least" absorption: a retune judges the excess
            # over it.
            x_star = fit_abs.x_of(rec["velocity"])
        else:
            x_star = float(np.clip(vertex, x_lo, x_hi)) if vertex is not None else fit_abs.x_of(rec["velocity"])
        f = np.array([1.0, x_star, x_star**2])
        minimum = float(f @ fit_abs.coef)
        minimum_sd = math.sqrt(max(float(f @ fit_abs.cov @ f), 0.0))
        curvature = max(float(fit_abs.coef[2]), 0.0) * (1.0 + x_star) ** 2
        curvature_sd = math.sqrt(max(fit_abs.cov[2, 2], 0.0)) * (1.0 + x_star) ** 2
        drift = 0.0
        if lock.t_ref is not None and lock.slope != 0.0:
            drift = -float(lock.theta[3]) / lock.slope
        velocity_sd = curve.vertex_velocity_stderr() if curve is not None else self._vertex_velocity_stderr(fit_abs)
        if not math.isfinite(velocity_sd):
            velocity_sd = self.settings.velocity_step_fraction * rec["velocity"]
        if self.prior is not None:
            # A retune keeps the calibration's velocity: its uncertainty passes on.
            v_term, v_upper = self.prior.velocity_shortfall, self.prior.velocity_shortfall_upper
        else:
            short = self._shortfall_at(rec, clock)
            v_term, v_upper = short.velocity, short.velocity_upper
            if not (math.isfinite(v_term) and math.isfinite(v_upper)):
                v_term, v_upper = 0.0, 1.0
            v_term = float(min(max(v_term, 0.0), 1.0))
            v_upper = float(min(max(v_upper, v_term), 1.0))
        return LockPrior(
            velocity_m_per_s=rec["velocity"], velocity_stderr_m_per_s=velocity_sd, detuning_hz=rec["detuning"],
            slope_rad_per_hz=lock.slope, slope_stderr_rad_per_hz=lock.slope_stderr,
            cubic_rad_per_hz3=float(lock.theta[2]) / h**3,
            cubic_stderr_rad_per_hz3=math.sqrt(max(lock.cov[2, 2], 0.0)) / h**3,
            phase_at_peak_rad=star, phase_at_peak_stderr_rad=star_sd,
            absorption_min=float(np.clip(minimum, 0.0, 1.0)), absorption_min_stderr=minimum_sd,
            absorption_curvature=curvature, absorption_curvature_stderr=curvature_sd,
            inversion=float(min(max(self._inversion_scale(), 1e-3), 1.0)), peak_drift_hz_per_s=drift,
            velocity_shortfall=v_term, velocity_shortfall_upper=v_upper)

    def state(self, *, clock_s: float | None = None) -> dict[str, Any]:
        """JSON-ready summary of what was learned, for the journal and the next retune.

        Keys: ``results``, ``in_range``, ``stage``, ``slope_rad_per_hz``,
        ``slope_stderr_rad_per_hz``, ``phase_at_peak_rad``, ``phase_at_peak_stderr_rad``,
        ``detuning_at_peak_hz``, ``detuning_at_peak_stderr_hz``,
        ``velocity_least_absorption_m_per_s``, ``velocity_least_absorption_stderr_m_per_s``,
        ``velocity_note``, ``lock_fit`` (the phase curve ``alpha + s d + c (d / h)^3 + beta tau``
        with ``d`` the detuning set-point minus ``centre_hz``, ``h`` = ``step_hz`` and ``tau``
        the rig clock minus ``t_ref_s`` (0 when None): ``coefficients`` (alpha rad, s rad/Hz,
        c rad, beta rad/s), their ``covariance``, at ``velocity_m_per_s``), ``absorption_fit``
        (``velocity_ref_m_per_s``, ``coefficients`` of
        ``P_e = a0 + a1 x + a2 x^2`` with ``x = v_ref / v - 1``, ``covariance``),
        ``phase_drift_rad_per_s``, ``peak_drift_hz_per_s`` (the rate of the peak's detuning
        set-point, ``-phase drift / slope``), ``shortfall`` and ``prior`` (a
        :class:`LockPrior` dict, or None). Unknown numbers are None.
        """
        clock = self._now(clock_s)
        out: dict[str, Any] = {"results": len(self._obs), "in_range": len(self._in_range())}
        anchor = self._anchor()
        plan = self._velocity_plan()
        star, star_sd = self._phase_star()
        out.update(phase_at_peak_rad=star, phase_at_peak_stderr_rad=star_sd)
        keys = ("slope_rad_per_hz", "slope_stderr_rad_per_hz", "detuning_at_peak_hz", "detuning_at_peak_stderr_hz",
                "velocity_least_absorption_m_per_s", "velocity_least_absorption_stderr_m_per_s",
                "phase_drift_rad_per_s", "peak_drift_hz_per_s")
        out.update({key: None for key in keys})
        out.update(absorption_fit=None, lock_fit=None, inversion_fit=None,
                   velocity_note=plan["note"], prior=None,
                   velocity_best_inversion_m_per_s=None, velocity_best_inversion_stderr_m_per_s=None)
        if anchor is None:
            out["stage"] = "search"
        elif not plan["concluded"]:
            out["stage"] = "velocity" if self._lock_fit(anchor.velocity) is not None and \
                self._lock_fit(anchor.velocity).slope_known() else "lock"
        else:
            out["stage"] = "refine"
        velocity = self._recommended_velocity()
        lock = self._lock_fit(velocity)
        if lock is not None:
            out["slope_rad_per_hz"] = lock.slope
            out["slope_stderr_rad_per_hz"] = lock.slope_stderr
            # The whole fitted phase curve, so that a report draws the model that decided.
            out["lock_fit"] = {"velocity_m_per_s": lock.velocity, "centre_hz": lock.centre_hz,
                               "step_hz": lock.step_hz, "t_ref_s": lock.t_ref,
                               "coefficients": [float(v) for v in lock.theta],
                               "covariance": [[float(v) for v in row] for row in lock.cov]}
            if lock.t_ref is not None:
                out["phase_drift_rad_per_s"] = float(lock.theta[3])
                if lock.slope != 0.0:
                    out["peak_drift_hz_per_s"] = -float(lock.theta[3]) / lock.slope
        target = self._lock_target(velocity, clock)
        if target is not None:
            out["detuning_at_peak_hz"], out["detuning_at_peak_stderr_hz"] = target
        fit = self._absorption_fit()
        if self._absorption_ready(fit):
            out["absorption_fit"] = {"velocity_ref_m_per_s": fit.velocity_ref,
                                     "coefficients": [float(v) for v in fit.coef],
                                     "covariance": [[float(v) for v in row] for row in fit.cov]}
            vertex = fit.vertex()
            if vertex is not None:
                out["velocity_least_absorption_m_per_s"] = fit.velocity_of(vertex)
                out["velocity_least_absorption_stderr_m_per_s"] = self._vertex_velocity_stderr(fit)
        curve = self._velocity_curve()
        if curve is not None:
            peak = curve.vertex()
            out["inversion_fit"] = {"velocity_ref_m_per_s": curve.velocity_ref,
                                    "coefficients": [float(v) for v in curve.coef],
                                    "covariance": [[float(v) for v in row] for row in curve.cov],
                                    "proxy_slope_curvature": [float(v) for v in curve.proxy],
                                    "discrepancy_widened": bool(curve.widened)}
            if peak is not None:
                out["velocity_best_inversion_m_per_s"] = curve.velocity_of(peak)
                out["velocity_best_inversion_stderr_m_per_s"] = curve.vertex_velocity_stderr()
        out["shortfall"] = self.shortfall(clock_s=clock).to_dict()
        prior = self.learned_prior(clock_s=clock)
        out["prior"] = prior.to_dict() if prior is not None else None
        return {key: (finite_or_none(value) if isinstance(value, float) else value) for key, value in out.items()}
