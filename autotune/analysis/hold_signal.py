"""The noise of the hold's checks, measured (pure).

:class:`NoiseModel` (the phase and inversion variance per shot of the checks so far) and
:class:`SignalModel` (detected atoms per shot, the two contrasts and the fits' dispersion: the
phase variance per shot they predict and the least check the lock can read), from the rows
:func:`autotune.analysis.hold_check.noise_row` keeps of each measurement.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from autotune.analysis.hold_lock import fringe_variances_per_atom, is_finite_number
from autotune.errors import ValueRefused

__all__ = ["USABLE_Z", "NoiseModel", "SignalModel"]

# Standard deviations of room a check must leave for the lock to read it (one-sided 0.5 %:
# scipy.stats.norm.isf(0.005)); a check read as unusable twice raises an alarm.
USABLE_Z = 2.576


@dataclass(frozen=True)
class NoiseModel:
    """Variance per shot of a check's phase shift and inversion, measured.

    A fringe pair's estimates have variances that scale as one over the shots (binomial
    counts; common practice), so ``phase_variance_shots = stderr^2 * shots`` is a property of
    the rig at its set-points; the median over the measurements so far is robust to one odd
    fringe.

    Attributes
    ----------
    phase_variance_shots : float
        rad^2 times shots.
    inversion_variance_shots : float
        Inversion variance times shots.
    measurements : int
        How many measurements it comes from.
    """

    phase_variance_shots: float
    inversion_variance_shots: float
    measurements: int

    @classmethod
    def from_estimates(cls, rows: Sequence[tuple[float, float, int]]) -> NoiseModel:
        """From ``(phase_stderr_rad, inversion_stderr, shots)`` of measurements (at least one)."""
        usable = [(p, i, n) for p, i, n in rows
                  if n > 0 and is_finite_number(p) and is_finite_number(i) and p > 0]
        if not usable:
            raise ValueRefused("NoiseModel: expected at least one measurement with a phase stderr")
        return cls(float(np.median([p * p * n for p, _, n in usable])),
                   float(np.median([i * i * n for _, i, n in usable])), len(usable))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping."""
        return asdict(self)


@dataclass(frozen=True)
class SignalModel:
    """What one shot tells of the fringes at the held set-points, measured on this rig.

    A fringe ``P_g(phi) = a + (C / 2) cos(phi + chi)`` fitted by least squares to ``N``
    detected atoms spread evenly over the Ramsey phases, with the binomial variance
    ``p (1 - p) = 1/4 - (C^2 / 4) cos^2(phi + chi)`` (at ``a = 1/2``) weighted by the fit's
    projections across and along the fringe's direction, has
    ``Var chi = (2 - C^2 / 2) / (N C^2)`` and ``Var C = (2 - 3 C^2 / 2) / N`` (binomial least
    squares and the delta method; our derivation from docs/physics.md section 5, checked against
    seeded binomial draws in the tests). The photon phase shift is the difference of two fringes, one
    per field, each measured on half of a check's shots. Noise beyond the counts (phase
    noise of the rig, a fringe that is not quite sinusoidal) shows as a reduced chi-square
    above one; the variances are scaled by it (quasi-likelihood, common practice).

    The model is pooled over every detected atom of the measurements so far, so it is steady
    where a fringe's own delta-method error is not (a few atoms per phase on a poor detector).

    Attributes
    ----------
    detected_per_shot_empty, detected_per_shot_one_photon : float
        Detected atoms per shot of each field.
    contrast_empty, contrast_one_photon : float
        The fringes' contrasts (medians of the measurements).
    dispersion : float
        Median of the fits' reduced chi-squares, at least 1. A median, not the pooled ratio:
        one long fit whose fringe moved while it was measured (a stage's verification with the
        cavity drifting) can carry a reduced chi-square of 9 where the checks show none; pooled,
        it made a night plan its checks for four times the phase variance their own innovations
        showed (a mismatch night: ``z`` variance 1.1 against the measured variance).
    measurements : int
        How many measurements it comes from.
    """

    detected_per_shot_empty: float
    detected_per_shot_one_photon: float
    contrast_empty: float
    contrast_one_photon: float
    dispersion: float
    measurements: int

    @classmethod
    def from_rows(cls, rows: Sequence[Sequence[float]]) -> SignalModel | None:
        """From noise rows ``(phase_sd, inversion_sd, shots, detected_empty, detected_one_photon,
        contrast_empty, contrast_one_photon, chi2, dof)``; None without such rows.

        Rows of three numbers (journals written before the model) are skipped.
        """
        usable = [r for r in rows if len(r) >= 9 and int(r[2]) > 0
                  and all(is_finite_number(x) for x in r[:9]) and float(r[5]) > 0.0]
        if not usable:
            return None
        shots_per_field = sum(0.5 * float(r[2]) for r in usable)
        reduced = [float(r[7]) / float(r[8]) for r in usable if float(r[8]) > 0]
        return cls(sum(float(r[3]) for r in usable) / shots_per_field,
                   sum(float(r[4]) for r in usable) / shots_per_field,
                   float(np.median([float(r[5]) for r in usable])),
                   float(np.median([max(float(r[6]), 0.0) for r in usable])),
                   max(float(np.median(reduced)), 1.0) if reduced else 1.0, len(usable))

    @staticmethod
    def _per_atom(contrast: float) -> tuple[float, float]:
        """``(Var chi, Var C)`` of one fringe times its detected atoms."""
        return fringe_variances_per_atom(contrast)

    @property
    def phase_variance_shots(self) -> float:
        """Variance of the photon phase shift times a check's shots (rad^2)."""
        total = 0.0
        for atoms, contrast in ((self.detected_per_shot_empty, self.contrast_empty),
                                (self.detected_per_shot_one_photon, self.contrast_one_photon)):
            # Each field gets half of the shots: Var = v / (n shots / 2).
            total += 2.0 * self._per_atom(contrast)[0] / max(atoms, 1e-9)
        return self.dispersion * total

    def contrast_margin_sd(self, shots: int, ratio: float) -> tuple[float, float]:
        """``C1 - ratio C0`` and its standard deviation for a check of ``shots`` shots."""
        half = max(0.5 * shots, 1e-9)
        var = self.dispersion * (
            self._per_atom(self.contrast_one_photon)[1]
            / max(self.detected_per_shot_one_photon * half, 1e-9)
            + ratio**2 * self._per_atom(self.contrast_empty)[1]
            / max(self.detected_per_shot_empty * half, 1e-9))
        return self.contrast_one_photon - ratio * self.contrast_empty, math.sqrt(var)

    def usable_shots(self, *, ratio: float, phase_margin_rad: float,
                     z: float = USABLE_Z, wrap_sigmas: float | None = None,
                     wrap_margin_rad: float = math.pi) -> int | None:
        """Fewest shots of a check whose phase the lock can read with ``z`` standard deviations
        of room: the one-photon contrast above ``ratio`` of the empty one, and the phase error
        at the design shift within the capture range (``phase_margin_rad`` of room).

        A poor one-photon source (its contrast below ``ratio`` of the empty one) is read by the
        lock's other gate when ``wrap_sigmas`` (``w``, :attr:`LockSettings.phase_wrap_sigmas`)
        is given: the phase error ``w`` of the check's own standard errors inside the wrap
        (``wrap_margin_rad`` ``m`` of room at the design shift,
        :func:`autotune.analysis.lock_fit.phase_signal_note`). That own standard error scales
        as one over the check's measured one-photon contrast ``C``, so the gate holds while
        ``C >= C1 w sigma / m``, with ``sigma`` the phase's standard deviation: with ``z``
        standard deviations of ``C`` to spare, ``sqrt(n) >= z s_C / C1 + w s_phi / m`` for
        per-shot deviations ``s_C`` and ``s_phi`` (the delta method; our derivation), besides
        the capture range's ``z``.

        None when the rig's own contrasts leave no room at any size.
        """
        margin, margin_sd = self.contrast_margin_sd(2, ratio)  # one shot per field
        if phase_margin_rad <= 0.0:
            return None
        phase_shots = z * z * self.phase_variance_shots / phase_margin_rad**2
        if margin > 0.0:
            contrast_shots = 2.0 * z * z * margin_sd**2 / margin**2
            return int(math.ceil(max(contrast_shots, phase_shots)))
        one_photon, one_sd = self.contrast_margin_sd(2, 0.0)
        if wrap_sigmas is None or wrap_margin_rad <= 0.0 or one_photon <= 0.0:
            return None
        # contrast_margin_sd(2, .) is one shot per field: a check of n shots has sqrt(2 / n) of it.
        root = (z * one_sd * math.sqrt(2.0) / one_photon
                + wrap_sigmas * math.sqrt(self.phase_variance_shots) / wrap_margin_rad)
        return int(math.ceil(max(root * root, phase_shots)))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping."""
        return asdict(self)
