"""The phase lock's proposals: the shots of a step and the choice of the next point (bracket, lock,
velocity step, fallback) (pure, no I/O).

Moved out of :mod:`autotune.analysis.guided` (the physics is described there);
:class:`ProposalChoice` is a part of :class:`~autotune.analysis.guided.PhaseLockSearch`, reading
its state.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from autotune.analysis.lock_fit import mixture_phase_gain
from autotune.analysis.next_point import SAME_VELOCITY, best_proposal, expected_after
from autotune.analysis.shortfall import Shortfall
from autotune.analysis.search import Proposal
from autotune.wire.rig import measurement_shots

__all__ = ["ProposalChoice"]

# Two velocities closer than this (relative) are one velocity group of the absorption fit.
_SAME_VELOCITY = SAME_VELOCITY


class ProposalChoice:
    """The proposals of :class:`~autotune.analysis.guided.PhaseLockSearch` (a part of it, not used alone)."""

    # -- proposals --------------------------------------------------------------------------

    def step_shots(self, purpose: str) -> int:
        """Shots per field and phase of a lock (``"lock"``, ``"relock"``) or velocity step.

        Sized from the measured error per shot of the usable points so far (median of
        ``stderr^2 x shots``: the one-photon contrast, the atom rate and the detection
        efficiency are all in it) to give ``step_phase_stderr_rad`` (lock: the one-photon phase
        error's, the measured phase's error times the mixture law's gain ``1 - q``, 1 for a pure
        photon) or ``step_absorption_stderr`` (velocity), within ``step_shots_range`` times the
        configured shots; the configured shots before any usable point.
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
            # The target is the one-photon phase error's: on a poor source read through the
            # mixture's law the measured phase's noise moves it by the law's gain, 1 - q at
            # the peak (lock_fit.mixture_phase_gain; 1 for a pure photon).
            gain = mixture_phase_gain(0.0, self._mixture_low())
            total = per_shot * gain**2 / s.step_phase_stderr_rad**2
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
