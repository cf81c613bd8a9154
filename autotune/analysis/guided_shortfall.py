"""The phase lock's shortfall: the bound on the inversion given up, the acceptance, the stopping
rules and the best inversion seen (pure, no I/O).

Moved out of :mod:`autotune.analysis.guided` (the physics is described there);
:class:`ShortfallBound` is a part of :class:`~autotune.analysis.guided.PhaseLockSearch`, reading
its state.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from autotune.analysis.lock_fit import mixture_phase_error
from autotune.analysis.next_point import expected_fall, points_to_reach
from autotune.analysis.retune_verdict import inherited_draws
from autotune.analysis.shortfall import Shortfall
from autotune.analysis.velocity_model import InversionCurve, AbsorptionFit, cholesky_jittered

__all__ = ["ShortfallBound"]

# A point within this relative velocity of the recommendation counts as measured there (the
# phase at the peak does not depend on the velocity, and the velocity tolerance is several %).
_AT_VELOCITY = 0.02


class ShortfallBound:
    """The shortfall and stopping of :class:`~autotune.analysis.guided.PhaseLockSearch` (a part of it, not used alone)."""

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
            # The phase error is measured on the mixed field's fringe; the inversion follows
            # the one-photon phase error behind it (lock_fit.mixture_phase_error), at the
            # cautious end of the source's empty fraction (0 for a pure photon, or until the
            # inversions show the mixture's slower fall).
            empty = self._mixture_low()
            eps = mixture_phase_error(mu + sigma * normals[:, 0], empty)
            d_draws = 1.0 - np.cos(0.5 * eps)
            d_point = 1.0 - math.cos(0.5 * float(mixture_phase_error(mu, empty)))
            from scipy import stats  # scipy.stats loads here, not at import
            eps2 = sigma**2 * float(stats.ncx2.ppf(q, 1, (mu / sigma) ** 2)) if sigma > 0 else mu**2
            d_upper = 1.0 - math.cos(0.5 * min(float(mixture_phase_error(math.sqrt(eps2), empty)), math.pi))
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
        The points needed follow the bound's fall as the information grows
        (:func:`~autotune.analysis.next_point.points_to_reach`), not the first point's fall
        extrapolated. The point budget, not the shots spent so far, is the horizon: the margin
        below the bar is what a retune inherits (its acceptance counts the calibration's
        velocity term), so a calibration that stops within the bar leaves its retunes short
        (benchmarks/README.md, "Session 11").
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
        # A bound after the next point that is no number (NaN) says nothing either way; an
        # infinite one says that no point lowers it (points_to_reach: inf).
        if not math.isfinite(now) or now <= target or now > bar or math.isnan(after):
            return None
        points = points_to_reach(now, after, target)
        if points <= points_left:
            return None
        needed = "no point lowers it" if not math.isfinite(points) else \
            f"{math.ceil(points)} points, the next at {now - after:.2%} and each later one less"
        return (f"the target {target:.1%} is out of reach within the point budget: the bound {now:.2%} "
                f"(within the acceptance bar {bar:.1%}) would need {needed}, more than the "
                f"{points_left} left")

    def _lock_not_established(self) -> str | None:
        """Why the detuning lock is not established after twice the fallback's first design,
        or None (established, a retune with its stored slope, or fewer points so far).

        A one-photon source prepared with a probability near 0.5 mixes the inverted one-photon
        fringe with the empty one: near the best the one-photon contrast falls to about
        ``2 p1 - 1`` of the empty one, below ``min_contrast_ratio`` wherever the inversion is
        high, and its phase's own standard error grows as the contrast falls; once it reaches
        the wrap (``phase_wrap_sigmas``, lock_fit.phase_signal_note) no point there steers the
        lock. More points of the fallback's search do not change that; the stage should stop
        and say what to check.
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
            cause = (f"the one-photon contrast was below {s.min_contrast_ratio:.2f} of the empty one, its "
                     f"phase too noisy to steer, at {low} of {len(notes)} points (check the one-photon source's preparation probability "
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
