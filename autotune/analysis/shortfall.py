"""What the phase lock reports: the predicted shortfall and a retune's verdict (pure data)."""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any

__all__ = ["Shortfall", "Verdict"]


def finite_or_none(value: float) -> float | None:
    """The value as a float, or None where it is not finite (JSON has no infinity or NaN)."""
    return float(value) if math.isfinite(float(value)) else None


@dataclass(frozen=True)
class Shortfall:
    """Predicted relative shortfall of a setting below the best (inversion fractions).

    Attributes
    ----------
    estimate : float
        Point estimate: detuning term plus velocity term at the posterior means.
    upper : float
        Upper bound at ``confidence`` of their sum (seeded posterior draws).
    detuning, detuning_upper : float
        ``1 - cos(eps / 2)`` at the mean phase error, and its upper bound
        (``scipy.stats.ncx2`` for the Gaussian phase error's square).
    velocity, velocity_upper : float
        The velocity term at the posterior mean and its upper bound (draws): for a
        calibration the relative inversion lost against the best of the inversion curve
        along velocity (:mod:`autotune.analysis.velocity_model`) within the velocities it is trusted
        over; for a retune the excess absorption over the stored one divided by the inversion.
    phase_error_rad, phase_error_stderr_rad : float
        Posterior mean and standard deviation of the phase error at the setting (rad).
    confidence : float
        Level of the upper bounds.
    note : str
        Why a term is infinite (nothing known yet), or empty.
    """

    estimate: float
    upper: float
    detuning: float
    detuning_upper: float
    velocity: float
    velocity_upper: float
    phase_error_rad: float
    phase_error_stderr_rad: float
    confidence: float
    note: str = ""

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping (infinite values as None)."""
        out: dict[str, Any] = {}
        for f in fields(self):
            value = getattr(self, f.name)
            out[f.name] = value if isinstance(value, str) else finite_or_none(value)
        return out


@dataclass(frozen=True)
class Verdict:
    """A retune check's judgement of the last good set-points.

    Attributes
    ----------
    still_good : bool
        True when the check was in the capture range and the upper bound of the predicted
        shortfall is below ``still_good_shortfall``.
    in_range : bool
        Whether the check's phase signal was usable (identified, contrast, capture range).
    reason : str
        A sentence with the numbers behind the verdict, for the journal.
    detuning_error_hz, detuning_error_low_hz, detuning_error_high_hz : float
        Inferred set-point minus peak detuning and its interval at ``confidence`` (Hz; nan
        when out of range).
    velocity_excess_absorption, velocity_excess_absorption_stderr : float
        Check's absorption minus the stored least absorption, and its standard error (nan
        when the check's phase error is outside the absorption window).
    shortfall : Shortfall
        The predicted shortfall at the last good set-points.
    corrected : dict or None
        The corrected set-points when not still good and in range, else None.
    """

    still_good: bool
    in_range: bool
    reason: str
    detuning_error_hz: float
    detuning_error_low_hz: float
    detuning_error_high_hz: float
    velocity_excess_absorption: float
    velocity_excess_absorption_stderr: float
    shortfall: Shortfall
    corrected: dict[str, float] | None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping (nan and infinities as None)."""
        out: dict[str, Any] = {}
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, Shortfall):
                out[f.name] = value.to_dict()
            elif isinstance(value, (bool, str)) or value is None:
                out[f.name] = value
            elif isinstance(value, dict):
                out[f.name] = dict(value)
            else:
                out[f.name] = finite_or_none(value)
        return out
