"""A retune's verdict on the last good set-points (pure, no I/O).

The retune's check measures at the last good set-points; its phase error with the stored
slope (and cubic) says how far the peak has moved, its excess absorption over the stored one
how far the velocity has, and the calibration's own velocity term (stored with the prior)
stays in the bound because a retune keeps that velocity. See :mod:`autotune.analysis.guided`'s notes;
:mod:`autotune.analysis.guided` imports this module, never the reverse.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
from scipy import special

from autotune.analysis.lock_fit import detuning_offset
from autotune.analysis.shortfall import Shortfall, Verdict

if TYPE_CHECKING:
    from autotune.analysis.guided import PhaseLockSearch
    from autotune.analysis.search_types import PointResult

__all__ = ["inherited_draws", "retune_verdict"]

#: Smallest inversion scale used as the denominator of the velocity term.
_MIN_INVERSION_SCALE = 0.05


def inherited_draws(search: PhaseLockSearch, count: int) -> tuple[np.ndarray, float]:
    """A retune's share of the calibration's velocity term: draws and the point value.

    The stored term is told as its estimate ``e`` and upper bound ``u`` at the confidence;
    the draws are ``e + (u - e) |z| / z_q`` with ``z`` standard normal and ``z_q`` the
    half-normal's quantile at the confidence, so that their quantile there is ``u``.
    """
    p = search.prior
    if p is None or p.velocity_shortfall_upper <= 0.0:
        return np.zeros(count), 0.0
    z_q = float(special.ndtri(0.5 + 0.5 * search.settings.confidence))
    rng = np.random.default_rng([search.seed, 17, len(search._obs)])
    spread = (p.velocity_shortfall_upper - p.velocity_shortfall) / z_q
    return p.velocity_shortfall + spread * np.abs(rng.standard_normal(count)), p.velocity_shortfall


def _velocity_terms(search: PhaseLockSearch, result: PointResult, error: float, normals: np.ndarray,
                    scale: float) -> tuple[np.ndarray, float, float, float, str]:
    """The check's velocity shortfall: (draws, point value, excess absorption, its sd, text).

    Judged from the check's excess absorption over the stored least absorption, only while its
    phase error is inside the absorption window (beyond it the absorption says nothing of the
    velocity).
    """
    p = search.prior
    if abs(error) > search.settings.absorption_phase_window_rad:
        return (np.zeros(len(normals)), 0.0, math.nan, math.nan,
                "velocity not judged (phase error beyond the absorption window)")
    excess = result.absorption - p.absorption_min
    excess_sd = math.hypot(result.absorption_stderr, p.absorption_min_stderr)
    v_draws = np.maximum(excess + excess_sd * normals, 0.0) / scale
    text = f"excess absorption {excess:+.4f} +- {excess_sd:.4f} over the stored least {p.absorption_min:.4f}"
    if p.absorption_curvature > 0 and excess > 0:
        text += (f" (velocity off by about +-{math.sqrt(excess / p.absorption_curvature):.1%}, "
                 "sign unknown)")
    return v_draws, max(excess, 0.0) / scale, excess, excess_sd, text


def retune_verdict(search: PhaseLockSearch, *, clock_s: float | None = None) -> Verdict:
    """Judge the last good set-points from the retune's check (the first ``"check"`` result).

    The detuning error comes from the check's phase error and the stored slope (and cubic),
    with both uncertainties (delta method); the velocity error from the check's excess
    absorption over the stored least absorption. Still good when the check is in the
    capture range and the upper bound (at ``confidence``) of the predicted shortfall at
    the last good set-points is below ``still_good_shortfall``.

    Raises
    ------
    RuntimeError
        Without a prior (not a retune) or before the check was observed.
    """
    search._check_clock(clock_s)
    if search.prior is None:
        raise RuntimeError("verdict: this search has no LockPrior; it is not a retune")
    checks = [o for o in search._obs if o.purpose == "check"]
    if not checks:
        raise RuntimeError("verdict: the check has not been observed yet")
    check = checks[0]
    s = search.settings
    q = s.confidence
    z = float(special.ndtri(0.5 + 0.5 * q))
    note = search._range_note(check.result)
    nan = math.nan
    if note is not None:
        short = Shortfall(math.inf, math.inf, math.inf, math.inf, math.inf, math.inf, nan, math.inf, q, note)
        return Verdict(False, False, f"check out of the capture range ({note}): search needed",
                       nan, nan, nan, nan, nan, short, None)
    star, star_sd = search._phase_star_prior
    error = search._phase_error(check.result, star)
    error_sd = math.hypot(check.result.phase_shift_stderr, star_sd)
    p = search.prior
    slope, slope_sd = search._slope_prior()
    offset, offset_sd = detuning_offset(error, error_sd, slope, slope_sd, p.cubic_rad_per_hz3,
                                        p.cubic_stderr_rad_per_hz3)
    normals = search._draw_normals(2, 13)
    eps = error + error_sd * normals[:, 0]
    d_draws = 1.0 - np.cos(0.5 * eps)
    d_point = 1.0 - math.cos(0.5 * error)
    from scipy import stats  # scipy.stats loads here, not at import
    eps2 = error_sd**2 * float(stats.ncx2.ppf(q, 1, (error / error_sd) ** 2))
    d_upper = 1.0 - math.cos(0.5 * min(math.sqrt(eps2), math.pi))
    scale = max(p.inversion, _MIN_INVERSION_SCALE)
    v_draws, v_point, excess, excess_sd, velocity_text = _velocity_terms(search, check.result, error,
                                                                        normals[:, 1], scale)
    # The calibration's own uncertainty of the velocity the retune keeps.
    inherited, inherited_point = inherited_draws(search, len(v_draws))
    v_draws = v_draws + inherited
    v_point += inherited_point
    v_upper = float(np.quantile(v_draws, q))
    total = d_draws + v_draws
    upper = float(np.quantile(total, q))
    short = Shortfall(d_point + v_point, upper, d_point, d_upper, v_point, v_upper, error, error_sd, q)
    still_good = upper <= s.still_good_shortfall
    low, high = offset - z * offset_sd, offset + z * offset_sd
    corrected = None
    if not still_good:
        detuning = search._clip_detuning(check.detuning - offset)
        corrected = {"velocity": check.velocity, "detuning": detuning}
    reason = (f"check's phase error {error / math.pi:+.3f} +- {error_sd / math.pi:.3f} pi: set-point "
              f"{offset / 1e3:+.2f} kHz from the peak [{low / 1e3:+.2f}, {high / 1e3:+.2f}] ({q:.0%}); "
              f"{velocity_text}; predicted shortfall {short.estimate:.2%}, bound {upper:.2%} "
              f"{'within' if still_good else 'above'} {s.still_good_shortfall:.1%}")
    if corrected is not None:
        reason += f": correct the detuning to {corrected['detuning'] / 1e3:+.2f} kHz"
    return Verdict(still_good, True, reason, offset, low, high, excess, excess_sd, short, corrected)
