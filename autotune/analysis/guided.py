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
  the value to be measured), a velocity step's expected fall weighted by the chance, learned
  from this stage's points, that it comes back usable (:mod:`autotune.analysis.next_point`);
  each proposal's ``reason`` says which term and by how much.
  :meth:`PhaseLockSearch.converged` is true when the bound is below ``target_shortfall``.
- **A poor one-photon source.** A field ``p0 |0> + p1 |1>`` gives the one-photon fringe the
  amplitude ``p0 - p1 |a| e^{i eps}`` (docs/physics.md section 5b): a contrast ratio near
  ``2 p1 - 1`` at the peak (0.16 at ``p1 = 0.58``, below ``min_contrast_ratio``) and a
  measured phase error ``psi = arg(e^{i eps} - q)``, ``q = p0 / (p1 |a|)``, about
  ``p1 / (2 p1 - 1)`` times ``eps`` near the peak. Such a point still steers the lock when its
  phase error lies ``phase_wrap_sigmas`` of its own standard errors inside the wrap at pi
  (:func:`autotune.analysis.lock_fit.phase_signal_note`); the step shots follow its measured
  phase error per shot as for any point. The lock's curve is fitted to ``psi`` as measured; the
  inversion follows ``eps = psi - arcsin(q sin psi)``
  (:func:`~autotune.analysis.lock_fit.mixture_phase_error`) in the detuning term, the phase at the
  peak's ``cos(eps / 2)`` law, the velocity curve's phase correction and the verification's
  correction, with ``q`` from the contrast ratio and the absorption near the peak at its
  cautious (low) end, and 0 (the pure photon's law, which overstates the loss) while that
  ratio reaches ``min_contrast_ratio`` or when the inversions' fall with the phase prefers the
  pure law (marginal likelihood, by a factor e^2). A velocity step whose phase is too faint to
  steer still measures the absorption and the inversion: on such a source its phase is the
  lock's prediction there (``phase_velocity_error_rad`` included).
- **Fallback.** Where the phase signal is not usable (fringes not identified, a one-photon
  contrast too low against the empty one with a phase too noisy to keep off the wrap, or a
  phase error beyond the capture range, where the angle wraps), a Gaussian-process search on the inversion
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
usable point is measured, then the shots that give a lock step a one-photon phase error's
standard error of ``step_phase_stderr_rad`` (the measured phase's, times the mixture law's gain
``1 - q`` on a poor source) and a velocity step an absorption standard error of
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
from typing import Any

import numpy as np
from scipy import special

from autotune.analysis.lock_fit import (
    detuning_offset,
    mixture_measured_phase,
    phase_signal_note,
)
from autotune.analysis.lock_settings import LockPrior, LockSettings, is_number
from autotune.analysis.next_point import SAME_VELOCITY
from autotune.analysis.retune_verdict import retune_verdict
from autotune.analysis.shortfall import Shortfall, Verdict, finite_or_none
from autotune.analysis.search import (
    PURPOSES,
    BayesianSearch,
    PointResult,
    Proposal,
    Recommendation,
    SearchSpace,
)
from autotune.analysis.guided_absorption import AbsorptionSignal
from autotune.analysis.guided_phase import Observation, PhaseSignal
from autotune.analysis.guided_proposals import ProposalChoice
from autotune.analysis.guided_shortfall import ShortfallBound
from autotune.analysis.velocity_model import AbsorptionFit, ProxyDisagreement
from autotune.errors import ValueRefused

__all__ = ["LockSettings", "LockPrior", "Shortfall", "Verdict", "PhaseLockSearch",
           "phase_signal_note", "detuning_offset"]

_TWO_PI = 2.0 * math.pi
# Two velocities closer than this (relative) are one velocity group of the absorption fit.
_SAME_VELOCITY = SAME_VELOCITY


def _disagreement_dict(d: ProxyDisagreement | None,
                       velocity_ref: float) -> dict[str, Any] | None:
    """The inversions' slope against the absorption's (velocity_model.proxy_disagreement), for
    the journal: slopes in inversion per unit of ``x = v_ref / v - 1``, whether they differ at
    the module's level, and the velocity group that carries the disagreement (m/s) with each
    group's residual in its own standard deviations."""
    if d is None:
        return None
    with np.errstate(divide="ignore", invalid="ignore"):
        scores = np.where(d.residual_stderr > 0.0, d.residual / d.residual_stderr, 0.0)
    return {"inversion_slope": d.slope, "inversion_slope_stderr": d.slope_stderr,
            "absorption_slope": d.proxy_slope, "absorption_slope_stderr": d.proxy_slope_stderr,
            "z": d.z, "p_value": d.p_value, "significant": d.significant(),
            "group_velocities_m_per_s": [velocity_ref / (1.0 + x) for x in d.x.tolist()],
            "group_residual_z": [float(v) for v in scores],
            "farthest_group_m_per_s": velocity_ref / (1.0 + float(d.x[d.farthest_group()]))}


# --------------------------------------------------------------------------------------------
# The strategy
# --------------------------------------------------------------------------------------------


class PhaseLockSearch(PhaseSignal, AbsorptionSignal, ShortfallBound, ProposalChoice):
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
            raise ValueRefused(f"space: expected a SearchSpace, got {type(space).__name__}")
        if set(space.names) != {"velocity", "detuning"}:
            raise ValueRefused(f"space: expected the dimensions ['velocity', 'detuning'], got {list(space.names)}")
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
            raise ValueRefused(f"seed: expected an integer, got {seed!r}")
        settings = LockSettings() if settings is None else settings
        if not isinstance(settings, LockSettings):
            raise ValueRefused(f"settings: expected a LockSettings, got {type(settings).__name__}")
        if prior is not None and not isinstance(prior, LockPrior):
            raise ValueRefused(f"prior: expected None or a LockPrior (LockPrior.from_dict), got {type(prior).__name__}")
        try:
            start_values = space.to_array(start)
        except ValueError as exc:
            raise ValueRefused(f"start: {exc}") from None
        if not space.contains(start):
            raise ValueRefused(f"start: expected a point inside the box "
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
        self._obs: list[Observation] = []
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
            raise ValueRefused(f"clock_s: expected None or a finite number of seconds, got {clock_s!r}")
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
            raise ValueRefused(f"purpose: expected one of {list(PURPOSES)}, got {purpose!r}")
        if not isinstance(result, PointResult):
            raise ValueRefused(f"result: expected a PointResult (PointResult.from_estimate), got {type(result).__name__}")
        values = self.space.to_array(point)
        slack = 1e-9 * (self.space.highs - self.space.lows)
        if np.any(values < self.space.lows - slack) or np.any(values > self.space.highs + slack):
            raise ValueRefused(f"point: expected within "
                               f"{dict(zip(self.space.names, zip(self.space.lows.tolist(), self.space.highs.tolist())))}, "
                               f"got {dict(point)}")
        values = np.clip(values, self.space.lows, self.space.highs)
        named = dict(zip(self.space.names, values.tolist()))
        self._obs.append(Observation(float(named["velocity"]), float(named["detuning"]), result, str(purpose)))
        self._cache.clear()

    def tell(self, point: Mapping[str, float], value: float, stderr: float, *,
             clock_s: float | None = None) -> None:
        """Record an inversion alone (no phase signal): the point counts as out of the capture range."""
        for label, number in (("value", value), ("stderr", stderr)):
            if not is_number(number) or not math.isfinite(float(number)):
                raise ValueRefused(f"{label}: expected a finite number, got {number!r}")
        result = PointResult(
            inversion=float(value), inversion_stderr=float(stderr), phase_shift=0.0,
            phase_shift_stderr=_TWO_PI / math.sqrt(12.0), absorption=0.5, absorption_stderr=0.5,
            contrast_empty=0.0, contrast_empty_stderr=1.0, contrast_one_photon=0.0,
            contrast_one_photon_stderr=1.0, identified=False, clock_s=self._check_clock(clock_s), shots=0)
        self.observe(point, result, purpose="search")

    def ask(self, *, clock_s: float | None = None) -> dict[str, float]:
        """The point of :meth:`propose`."""
        return dict(self.propose(clock_s=clock_s).point)

    # -- the recommendation -----------------------------------------------------------------

    def _velocity_plan(self) -> dict[str, Any]:
        """Where the velocity stage stands: concluded?, the chosen velocity, the next velocity."""
        return self._cached("velocity_plan", self._compute_velocity_plan)

    def _compute_velocity_plan(self) -> dict[str, Any]:
        anchor = self._anchor()
        low, high = self._velocity_box
        if anchor is None:
            return {"concluded": False, "velocity": self.start["velocity"], "next": None, "note": "no lock yet"}
        fit = self._absorption_fit()
        if self.prior is not None:
            # A retune starts from the stored absorption curve: concluded at the last good velocity
            # unless the data move the minimum.
            vertex = fit.vertex() if fit is not None else None
            if vertex is None:
                return {"concluded": True, "velocity": self.start["velocity"], "next": None,
                        "note": "stored absorption curve"}
            v = float(np.clip(fit.velocity_of(vertex), low, high))
            return {"concluded": True, "velocity": v, "next": None, "note": "stored absorption curve and the data"}
        faint = self._faint_velocity_phases()
        attempts = [(o.velocity, self._range_note(o.result) is None or id(o) in faint)
                    for o in self._obs if o.purpose == "velocity"]
        if not self._absorption_ready(fit):
            return self._absorption_plan(anchor.velocity, fit, attempts)
        return self._extension_plan(attempts)

    @staticmethod
    def _was_tried(v: float, attempts: list[tuple[float, bool]]) -> bool:
        """True when velocity ``v`` came back out of the capture range, or twice in range but
        outside the absorption window (the lock does not settle at that velocity)."""
        same = [usable for t, usable in attempts if abs(t / v - 1.0) <= _SAME_VELOCITY]
        return (not all(same)) or len(same) >= 2 if same else False

    def _absorption_plan(self, v0: float, fit: AbsorptionFit | None,
                         attempts: list[tuple[float, bool]]) -> dict[str, Any]:
        """The plan before the absorption's curvature is known: velocities around the lock's."""
        f = self.settings.velocity_step_fraction
        low, high = self._velocity_box
        for candidate in (v0 * (1.0 - f), v0 * (1.0 + f), v0 * (1.0 - 2.0 * f), v0 * (1.0 + 2.0 * f)):
            v = float(np.clip(candidate, low, high))
            known = fit is not None and any(abs(fit.x_of(v) - x) <= _SAME_VELOCITY for x in fit.x_groups)
            if known or self._was_tried(v, attempts) or abs(v / v0 - 1.0) <= _SAME_VELOCITY:
                continue
            return {"concluded": False, "velocity": v0, "next": v,
                    "note": "velocities around the lock for the absorption's curvature"}
        note = "no third usable velocity within the box: staying at the lock's velocity"
        faint = [n for n in (self._range_note(o.result) for o in self._obs if o.purpose == "velocity")
                 if n is not None and n.startswith("one-photon/empty contrast")]
        if faint:
            # A poor source: the mixture's amplitude p0 + p1 a_g(1) nears zero a few steps
            # from the 2 pi velocity, and its phase with it.
            note += (f" (the one-photon phase too faint to use at {len(faint)} velocity step"
                     f"{'s' if len(faint) > 1 else ''}: check the one-photon source's preparation "
                     "probability)")
        return {"concluded": True, "velocity": v0, "next": None, "note": note}

    def _extension_plan(self, attempts: list[tuple[float, bool]]) -> dict[str, Any]:
        """The plan once the inversion curve exists: concluded when its optimum is bracketed,
        otherwise a step towards higher inversion, or the box edge (outward or not)."""
        f = self.settings.velocity_step_fraction
        low, high = self._velocity_box
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
        # The one-photon contrast falls as the pulse area leaves 2 pi on either side
        # (docs/physics.md section 5b): a velocity step that came back unusable between the
        # curve's end and the extension, or at it, says the extension will not be usable either.
        beyond = any(not usable and (t - end_v) * (v - end_v) > 0.0 and abs(t - end_v) <= abs(v - end_v)
                     for t, usable in attempts)
        if self._was_tried(v, attempts) or beyond:
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

    # -- after the verification -------------------------------------------------------------

    def _phase_error_test(self, obs: Observation, clock: float | None) -> tuple[float, float, float, float]:
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
        # The target's one-photon phase error, as the mixed field's fringe measures it.
        limit = float(mixture_measured_phase(2.0 * math.acos(1.0 - self.settings.target_shortfall),
                                             self._mixture_low()))
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

    def moved_recommendation(self, chosen: Mapping[str, float], short: Shortfall, *,
                             acceptance_bar: float, max_moves: int,
                             clock_s: float | None = None) -> str | None:
        """Why to verify the lock's recommendation in place of a verified choice, or None.

        A verification is data: told to the lock, it moves the posterior, and with it the
        recommendation. When the verified choice's bound ``short`` (:meth:`shortfall` at
        ``chosen``, every result told; the caller has it) misses ``acceptance_bar`` while the
        lock has converged at a recommendation elsewhere (its
        stop bound there within ``target_shortfall``), the stage should judge the point the lock
        now recommends rather than the one it recommended before the verification. At most
        ``max_moves`` such moves after a search step: the verified set-points since the last
        search step are counted, the first included. None also when the last result is not a
        verification or the recommendation is the verified choice.
        """
        clock = self._now(clock_s)
        if not self._obs or self._obs[-1].purpose not in ("verify", "correct"):
            return None
        verified: set[tuple[float, float]] = set()
        for o in reversed(self._obs):
            if o.purpose not in ("verify", "correct"):
                break
            verified.add((o.velocity, o.detuning))
        if len(verified) > max_moves:
            return None
        if short.upper <= acceptance_bar or not self.converged(clock_s=clock):
            return None
        rec = self.recommend(clock_s=clock).point
        if all(math.isclose(float(rec[k]), float(chosen[k]), rel_tol=1e-9, abs_tol=1e-6)
               for k in ("velocity", "detuning")):
            return None
        there = self._stop_bound(rec, clock)
        return (f"the verification, told to the lock, moved its recommendation to "
                f"{rec['velocity']:.1f} m/s, {rec['detuning'] / 1e3:+.2f} kHz (bound {there:.2%} "
                f"there, within the target {self.settings.target_shortfall:.1%}) from the "
                f"verified {chosen['velocity']:.1f} m/s, {chosen['detuning'] / 1e3:+.2f} kHz "
                f"(bound {short.upper:.2%}, above the bar {acceptance_bar:.1%}): verifying it")

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
        velocity_sd = curve.vertex_velocity_stderr() if curve is not None else fit_abs.vertex_velocity_stderr()
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
            velocity_shortfall=v_term, velocity_shortfall_upper=v_upper,
            mixture_empty_fraction=self._mixture_low())

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
                out["velocity_least_absorption_stderr_m_per_s"] = fit.vertex_velocity_stderr()
        curve = self._velocity_curve()
        if curve is not None:
            peak = curve.vertex()
            out["inversion_fit"] = {"velocity_ref_m_per_s": curve.velocity_ref,
                                    "coefficients": [float(v) for v in curve.coef],
                                    "covariance": [[float(v) for v in row] for row in curve.cov],
                                    "proxy_slope_curvature": [float(v) for v in curve.proxy],
                                    "discrepancy_widened": bool(curve.widened),
                                    "dephasing_law": (curve.law.to_dict()
                                                      if curve.law is not None else None),
                                    "disagreement": _disagreement_dict(curve.disagreement,
                                                                       curve.velocity_ref)}
            if peak is not None:
                out["velocity_best_inversion_m_per_s"] = curve.velocity_of(peak)
                out["velocity_best_inversion_stderr_m_per_s"] = curve.vertex_velocity_stderr()
        out["shortfall"] = self.shortfall(clock_s=clock).to_dict()
        prior = self.learned_prior(clock_s=clock)
        out["prior"] = prior.to_dict() if prior is not None else None
        return {key: (finite_or_none(value) if isinstance(value, float) else value) for key, value in out.items()}
