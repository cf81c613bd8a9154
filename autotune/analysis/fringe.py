"""Counts -> Ramsey fringe fit -> fringe inversion with uncertainty (pure, no I/O).

At each Ramsey phase ``phi_k`` (rad) the detectors give counts ``e_k, g_k, i_k`` of detected
atoms. The ground-state fraction ``P_g = g / (e + g + i)`` follows the fringe
``P_g(phi) = a + b cos(phi) + c sin(phi)``, which is linear in ``(a, b, c)``: a weighted
linear least-squares fit with binomial weights gives the estimate and its covariance in
closed form.

The figure of merit between the empty field (index 0) and the one-photon field (index 1) is
the fringe inversion

    I = max over phi of [P_g(phi | one photon) - P_g(phi | empty)]
      = (a1 - a0) + hypot(b1 - b0, c1 - c0),

reported with a parametric-bootstrap interval (see :func:`estimate_inversion`).
"""

from __future__ import annotations

import math
import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from scipy import special

from autotune.errors import EstimationError

__all__ = [
    "IntervalMethod",
    "proportion_interval",
    "FringeData",
    "FringeFit",
    "fit_fringe",
    "InversionEstimate",
    "estimate_inversion",
    "DEFAULT_RESAMPLES",
    "inversion_contrast_covariance",
    "shared_fringe_covariance",
]

IntervalMethod = Literal["wilson", "clopper_pearson"]

DEFAULT_RESAMPLES = 2000
"""Bootstrap resamples used by :func:`estimate_inversion` unless told otherwise."""

_TWO_PI = 2.0 * math.pi
# Distinct-phase test: phases closer than this (rad, on the circle) count as one phase.
_PHASE_TOLERANCE = 1e-9
# Standard deviation of a value spread uniformly over its whole physical range: the honest
# uncertainty when the counts say nothing (inversion in [-1, 1], angle on the circle,
# contrast in [0, 1]).
_UNINFORMED_INVERSION_STDERR = 2.0 / math.sqrt(12.0)
_UNINFORMED_ANGLE_STDERR = _TWO_PI / math.sqrt(12.0)
_UNINFORMED_CONTRAST_STDERR = 1.0 / math.sqrt(12.0)


# --------------------------------------------------------------------------------------------
# Binomial proportions
# --------------------------------------------------------------------------------------------


def _check_confidence(confidence: float) -> float:
    try:
        value = float(confidence)
    except (TypeError, ValueError) as exc:
        raise EstimationError(f"confidence: expected a number in (0, 1), got {confidence!r}") from exc
    if not (0.0 < value < 1.0):
        raise EstimationError(f"confidence: expected a number in (0, 1), got {confidence!r}")
    return value


def _as_counts(name: str, values: Any) -> np.ndarray:
    """Return ``values`` as an int64 array, or raise naming ``name`` if not non-negative integers."""
    array = np.asarray(values)
    if array.dtype == object or not (
        np.issubdtype(array.dtype, np.integer)
        or np.issubdtype(array.dtype, np.floating)
        or np.issubdtype(array.dtype, np.bool_)
    ):
        raise EstimationError(f"{name}: expected integer counts, got dtype {array.dtype}")
    if np.issubdtype(array.dtype, np.floating):
        if not np.all(np.isfinite(array)):
            raise EstimationError(f"{name}: expected finite integer counts, got {array.tolist()!r}")
        if not np.all(array == np.round(array)):
            raise EstimationError(f"{name}: expected integer counts, got {array.tolist()!r}")
    array = array.astype(np.int64)
    if np.any(array < 0):
        raise EstimationError(f"{name}: expected non-negative counts, got {array.tolist()!r}")
    return array


def proportion_interval(
    successes: Any,
    trials: Any,
    confidence: float = 0.95,
    method: IntervalMethod = "wilson",
) -> tuple[np.ndarray, np.ndarray]:
    """Two-sided confidence interval for a binomial proportion, vectorised.

    Parameters
    ----------
    successes, trials : int or array_like of int
        Number of successes ``k`` and trials ``n`` (broadcast together), ``0 <= k <= n``.
    confidence : float
        Confidence level in (0, 1), e.g. 0.95.
    method : {"wilson", "clopper_pearson"}
        ``"wilson"``: the Wilson score interval without continuity correction;
        ``"clopper_pearson"``: the exact interval from beta quantiles.

    Returns
    -------
    low, high : numpy.ndarray
        Interval bounds in [0, 1] with the broadcast shape (0-d for scalar input).
        ``trials == 0`` gives ``(0, 1)``.

    Raises
    ------
    EstimationError
        Counts not non-negative integers, ``successes > trials``, a confidence outside (0, 1)
        or an unknown method.
    """
    level = _check_confidence(confidence)
    k = _as_counts("successes", successes)
    n = _as_counts("trials", trials)
    try:
        k, n = np.broadcast_arrays(k, n)
    except ValueError as exc:
        raise EstimationError(
            f"successes and trials: shapes {k.shape} and {n.shape} do not broadcast"
        ) from exc
    if np.any(k > n):
        raise EstimationError(
            f"successes: expected at most trials, got successes {k.tolist()!r} for trials {n.tolist()!r}"
        )
    alpha = 1.0 - level
    kf = k.astype(float)
    nf = n.astype(float)
    empty = n == 0
    safe_n = np.where(empty, 1.0, nf)
    if method == "wilson":
        z = special.ndtri(1.0 - alpha / 2.0)
        z2 = z * z
        centre = (kf + z2 / 2.0) / (safe_n + z2)
        half = z / (safe_n + z2) * np.sqrt(kf * (safe_n - kf) / safe_n + z2 / 4.0)
        low = np.clip(centre - half, 0.0, 1.0)
        high = np.clip(centre + half, 0.0, 1.0)
        # Exact end points at k = 0 and k = n, free of rounding.
        low = np.where(k == 0, 0.0, low)
        high = np.where(k == n, 1.0, high)
    elif method == "clopper_pearson":
        from scipy import stats  # scipy.stats loads here, not at import
        with np.errstate(invalid="ignore", divide="ignore"):
            low = stats.beta.ppf(alpha / 2.0, kf, nf - kf + 1.0)
            high = stats.beta.ppf(1.0 - alpha / 2.0, kf + 1.0, nf - kf)
        low = np.where(k == 0, 0.0, low)
        high = np.where(k == n, 1.0, high)
    else:
        raise EstimationError(
            f"method: expected 'wilson' or 'clopper_pearson', got {method!r}"
        )
    low = np.where(empty, 0.0, low)
    high = np.where(empty, 1.0, high)
    return np.asarray(low, dtype=float), np.asarray(high, dtype=float)


# --------------------------------------------------------------------------------------------
# Fringe data and fit
# --------------------------------------------------------------------------------------------


def _distinct_phase_count(phases: np.ndarray) -> int:
    """Number of distinct phases on the circle (mod 2 pi, within ``_PHASE_TOLERANCE``)."""
    if phases.size == 0:
        return 0
    wrapped = np.sort(np.mod(phases, _TWO_PI))
    gaps = np.diff(np.concatenate([wrapped, [wrapped[0] + _TWO_PI]]))
    distinct = int(np.count_nonzero(gaps > _PHASE_TOLERANCE))
    return max(distinct, 1)


@dataclass(frozen=True, eq=False)
class FringeData:
    """Counts of detected atoms at K Ramsey phases, for one field state.

    Build it with :meth:`from_counts`, which checks the input; the arrays are read-only.

    Attributes
    ----------
    ramsey_phase : numpy.ndarray, shape (K,)
        Set Ramsey phase of each acquisition (rad, finite, any branch).
    e, g, i : numpy.ndarray of int64, shape (K,)
        Detected atoms assigned to e, g and i at each phase.
    """

    ramsey_phase: np.ndarray
    e: np.ndarray
    g: np.ndarray
    i: np.ndarray

    @classmethod
    def from_counts(cls, ramsey_phase: Any, e: Any, g: Any, i: Any) -> FringeData:
        """Check and freeze counts taken at K Ramsey phases.

        Parameters
        ----------
        ramsey_phase : array_like of float, shape (K,)
            Ramsey phases (rad), finite; at least 3 distinct values modulo 2 pi.
        e, g, i : array_like of int, shape (K,)
            Non-negative integer counts of detected atoms in e, g, i.

        Returns
        -------
        FringeData

        Raises
        ------
        EstimationError
            Lengths differ, a phase is not finite, a count is negative or not an integer,
            or fewer than 3 distinct phases modulo 2 pi.
        """
        try:
            phase = np.asarray(ramsey_phase, dtype=float)
        except (TypeError, ValueError) as exc:
            raise EstimationError(
                f"ramsey_phase: expected an array of finite floats (rad), got {ramsey_phase!r}"
            ) from exc
        if phase.ndim != 1:
            raise EstimationError(
                f"ramsey_phase: expected a 1-d array, got shape {phase.shape}"
            )
        if not np.all(np.isfinite(phase)):
            raise EstimationError(
                f"ramsey_phase: expected finite phases (rad), got {phase.tolist()!r}"
            )
        counts = {}
        for name, values in (("e", e), ("g", g), ("i", i)):
            array = _as_counts(name, values)
            if array.shape != phase.shape:
                raise EstimationError(
                    f"{name}: expected {phase.shape[0]} counts (one per ramsey_phase), "
                    f"got shape {array.shape}"
                )
            counts[name] = array
        distinct = _distinct_phase_count(phase)
        if distinct < 3:
            raise EstimationError(
                f"ramsey_phase: expected at least 3 distinct phases modulo 2 pi, got {distinct} "
                f"({phase.tolist()!r})"
            )
        for array in (phase, *counts.values()):
            array.setflags(write=False)
        return cls(phase, counts["e"], counts["g"], counts["i"])

    @property
    def detected(self) -> np.ndarray:
        """Detected atoms at each phase, ``e + g + i`` (shape (K,))."""
        return self.e + self.g + self.i

    def proportion_interval(
        self, confidence: float = 0.95, method: IntervalMethod = "wilson"
    ) -> tuple[np.ndarray, np.ndarray]:
        """Per-phase interval on ``P_g = g / (e + g + i)``; see :func:`proportion_interval`."""
        return proportion_interval(self.g, self.detected, confidence, method)


@dataclass(frozen=True, eq=False)
class FringeFit:
    """Weighted least-squares fit of ``P_g(phi) = a + b cos(phi) + c sin(phi)``.

    Attributes
    ----------
    coefficients : numpy.ndarray, shape (3,)
        ``(a, b, c)``, dimensionless probabilities.
    covariance : numpy.ndarray, shape (3, 3)
        Covariance of ``(a, b, c)`` from the binomial weights.
    chi2 : float
        Weighted sum of squared residuals.
    dof : int
        Degrees of freedom: phases with detected atoms minus 3.
    """

    coefficients: np.ndarray
    covariance: np.ndarray
    chi2: float
    dof: int

    @property
    def a(self) -> float:
        """Mean level of the fringe."""
        return float(self.coefficients[0])

    @property
    def b(self) -> float:
        """Cosine coefficient."""
        return float(self.coefficients[1])

    @property
    def c(self) -> float:
        """Sine coefficient."""
        return float(self.coefficients[2])

    @property
    def contrast(self) -> float:
        """Peak-to-peak amplitude ``2 hypot(b, c)`` of ``P_g``."""
        return 2.0 * math.hypot(self.b, self.c)

    @property
    def phase(self) -> float:
        """Fringe position ``atan2(c, b)`` (rad, in (-pi, pi]): ``P_g`` peaks at this phase."""
        return math.atan2(self.c, self.b)

    @property
    def reduced_chi2(self) -> float:
        """``chi2 / dof``; ``nan`` when ``dof == 0`` (the model passes through every point)."""
        return self.chi2 / self.dof if self.dof > 0 else math.nan

    def evaluate(self, ramsey_phase: Any) -> np.ndarray:
        """The fitted ``P_g`` at the given phases (rad)."""
        phi = np.asarray(ramsey_phase, dtype=float)
        return self.a + self.b * np.cos(phi) + self.c * np.sin(phi)


def _design(phase: np.ndarray) -> np.ndarray:
    return np.stack([np.ones_like(phase), np.cos(phase), np.sin(phase)], axis=-1)


def _variance_weights(fitted: np.ndarray, detected: np.ndarray) -> np.ndarray:
    """Binomial weights ``N / (p (1 - p))`` from the fitted probability, shrunk towards 1/2.

    ``p = (N clip(fitted, 0, 1) + 1) / (N + 2)`` keeps a phase whose fitted fraction is 0 or
    1 from taking infinite weight; a phase with no detected atom gets zero weight.
    """
    shrunk = (detected * np.clip(fitted, 0.0, 1.0) + 1.0) / (detected + 2.0)
    return detected / (shrunk * (1.0 - shrunk))


def _solve_weighted(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least squares for a batch: ``y, w`` of shape (..., K); returns (theta, normal)."""
    normal = np.einsum("...k,ki,kj->...ij", w, x, x)
    rhs = np.einsum("...k,ki,...k->...i", w, x, y)
    return np.linalg.solve(normal, rhs[..., None])[..., 0], normal


def _two_pass(x: np.ndarray, g: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The estimator: an atom-number weighted pass, then binomial weights from its fit.

    Weights taken from each phase's own fraction would correlate with the noise of that
    fraction and bias the fit at small counts; weights from a first smooth fit do not.
    Returns (theta, normal matrix, weights) for ``g`` of shape (..., K).
    """
    y = g / n
    first, _ = _solve_weighted(x, y, np.broadcast_to(n, y.shape))
    fitted = np.einsum("ki,...i->...k", x, first)
    w = _variance_weights(fitted, n)
    theta, normal = _solve_weighted(x, y, w)
    return theta, normal, w


def _identified(data: FringeData) -> bool:
    return _distinct_phase_count(data.ramsey_phase[data.detected > 0]) >= 3


def fit_fringe(data: FringeData) -> FringeFit:
    """Fit the fringe of one field state by weighted linear least squares, in closed form.

    Each phase contributes ``P_g = g / N`` (``N = e + g + i`` detected atoms). A first pass
    weights the phases by ``N``; the second, reported, pass uses the binomial weight
    ``N / (p (1 - p))`` with ``p = (N p1 + 1) / (N + 2)`` from the first fit ``p1`` clipped to
    [0, 1] (shrunk, so a fitted fraction of 0 or 1 does not give infinite weight). Phases
    with ``N = 0`` carry no weight.

    Parameters
    ----------
    data : FringeData

    Returns
    -------
    FringeFit
        Coefficients ``(a, b, c)``, their covariance ``(X^T W X)^-1``, ``chi2`` and ``dof``.

    Raises
    ------
    EstimationError
        Fewer than 3 distinct phases have detected atoms, so ``(a, b, c)`` is not determined.
    """
    detected = data.detected
    if not _identified(data):
        raise EstimationError(
            "counts: expected detected atoms at 3 or more distinct Ramsey phases, got "
            f"{_distinct_phase_count(data.ramsey_phase[detected > 0])} "
            f"(detected per phase {detected.tolist()!r})"
        )
    used = detected > 0
    x = _design(data.ramsey_phase[used])
    n = detected[used].astype(float)
    y = data.g[used] / n
    coefficients, normal, w = _two_pass(x, data.g[used].astype(float), n)
    covariance = np.linalg.inv(normal)
    covariance = (covariance + covariance.T) / 2.0
    residual = y - x @ coefficients
    chi2 = float(np.sum(w * residual**2))
    dof = int(np.count_nonzero(used)) - 3
    coefficients.setflags(write=False)
    covariance.setflags(write=False)
    return FringeFit(coefficients, covariance, chi2, dof)


def _fit_batch(phase: np.ndarray, g: np.ndarray, detected: np.ndarray) -> np.ndarray:
    """The estimator of :func:`fit_fringe` for a batch of resampled g counts.

    ``g`` has shape (B, K) (``detected`` is fixed, shape (K,)); returns (B, 3).
    """
    used = detected > 0
    x = _design(phase[used])
    theta, _, _ = _two_pass(x, g[:, used].astype(float), detected[used].astype(float))
    return theta


# --------------------------------------------------------------------------------------------
# Inversion
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class InversionEstimate:
    """Fringe inversion between the empty and the one-photon field, with uncertainties.

    All values are plain floats (angles in rad, the rest dimensionless probabilities);
    intervals are two-sided at level ``confidence``. None is ever NaN or infinite.

    Attributes
    ----------
    inversion : float
        ``(a1 - a0) + hypot(b1 - b0, c1 - c0)``, the maximum over the Ramsey phase of
        ``P_g(one photon) - P_g(empty)``.
    inversion_low, inversion_high : float
        Confidence interval on the inversion, within the physical range [-1, 1].
    inversion_stderr : float
        Standard error of the inversion (bootstrap standard deviation).
    phase_shift : float
        ``mod(phase_one - phase_empty, 2 pi)`` in [0, 2 pi) (rad), ``phase = atan2(c, b)``.
    phase_shift_stderr : float
        Standard error of the phase shift (rad).
    contrast_empty, contrast_one_photon : float
        ``2 hypot(b, c)`` of each fringe.
    contrast_empty_stderr, contrast_one_photon_stderr : float
        Their standard errors.
    absorption : float
        ``sum(e) / sum(e + g + i)`` for the one-photon field (0.5 if no atom was detected).
    absorption_low, absorption_high : float
        Wilson interval on the absorption.
    detected_empty, detected_one_photon : int
        Detected atoms summed over phases, per field.
    chi2_empty, chi2_one_photon : float
        Weighted residual sums of the two fits (0 when a fit was not possible).
    dof_empty, dof_one_photon : int
        Their degrees of freedom (phases with atoms minus 3; 0 when a fit was not possible).
    identified : bool
        False when a fringe was not determined (fewer than 3 phases with atoms); the
        intervals are then the whole physical range.
    confidence : float
        The confidence level of the intervals.
    resamples : int
        Bootstrap resamples used.
    """

    inversion: float
    inversion_low: float
    inversion_high: float
    inversion_stderr: float
    phase_shift: float
    phase_shift_stderr: float
    contrast_empty: float
    contrast_empty_stderr: float
    contrast_one_photon: float
    contrast_one_photon_stderr: float
    absorption: float
    absorption_low: float
    absorption_high: float
    detected_empty: int
    detected_one_photon: int
    chi2_empty: float
    dof_empty: int
    chi2_one_photon: float
    dof_one_photon: int
    identified: bool
    confidence: float
    resamples: int

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> InversionEstimate:
        """Rebuild an estimate from :meth:`to_dict`'s mapping (a journal record).

        Raises
        ------
        EstimationError
            A field is missing, unknown or of the wrong type (names the field).
        """
        if not isinstance(data, Mapping):
            raise EstimationError(f"estimate: expected a mapping, got {type(data).__name__}")
        names = [f.name for f in dataclasses.fields(cls)]
        missing = [n for n in names if n not in data]
        unknown = sorted(set(data) - set(names))
        if missing or unknown:
            raise EstimationError(f"estimate: expected the fields of InversionEstimate; missing "
                                  f"{missing}, unknown {unknown}")
        values: dict[str, Any] = {}
        for f in dataclasses.fields(cls):
            value = data[f.name]
            kind = f.type if isinstance(f.type, str) else f.type.__name__
            if kind == "bool":
                ok = isinstance(value, bool)
            elif kind == "int":
                ok = isinstance(value, int) and not isinstance(value, bool)
            else:
                ok = isinstance(value, int | float) and not isinstance(value, bool) and \
                    math.isfinite(value)
                value = float(value) if ok else value
            if not ok:
                raise EstimationError(f"estimate.{f.name}: expected a {kind}, got {value!r}")
            values[f.name] = value
        return cls(**values)

    def to_dict(self) -> dict[str, float | int | bool]:
        """JSON-ready mapping of every field (plain Python numbers)."""
        out: dict[str, float | int | bool] = {}
        for name, value in self.__dict__.items():
            if isinstance(value, bool):
                out[name] = bool(value)
            elif isinstance(value, (int, np.integer)):
                out[name] = int(value)
            else:
                out[name] = float(value)
        return out


def _wrap(angle: np.ndarray) -> np.ndarray:
    """Angle wrapped to [-pi, pi)."""
    return np.mod(angle + math.pi, _TWO_PI) - math.pi


def _mod_two_pi(angle: float) -> float:
    value = float(np.mod(angle, _TWO_PI))
    # np.mod of a tiny negative angle rounds to exactly 2 pi.
    return 0.0 if value >= _TWO_PI else value


def _check_pair(empty: FringeData, one_photon: FringeData) -> None:
    for name, data in (("empty", empty), ("one_photon", one_photon)):
        if not isinstance(data, FringeData):
            raise EstimationError(
                f"{name}: expected FringeData (use FringeData.from_counts), got {type(data).__name__}"
            )


def _resample_g(
    rng: np.random.Generator, fit: FringeFit, data: FringeData, resamples: int
) -> np.ndarray:
    """Draw g counts (B, K) from the fitted fringe at the observed detected totals.

    The fitted probability is kept at least ``1 / (N + 2)`` away from 0 and 1, so a phase
    with few atoms or an extreme observed fraction still varies between resamples.
    """
    n = data.detected
    floor = 1.0 / (n + 2.0)
    p = np.clip(fit.evaluate(data.ramsey_phase), floor, 1.0 - floor)
    return rng.binomial(n[None, :], p[None, :], size=(resamples, n.size))


def _fringe_quantities(theta0: np.ndarray, theta1: np.ndarray) -> dict[str, np.ndarray]:
    delta = theta1 - theta0
    return {
        "inversion": delta[..., 0] + np.hypot(delta[..., 1], delta[..., 2]),
        "phase0": np.arctan2(theta0[..., 2], theta0[..., 1]),
        "phase1": np.arctan2(theta1[..., 2], theta1[..., 1]),
        "contrast0": 2.0 * np.hypot(theta0[..., 1], theta0[..., 2]),
        "contrast1": 2.0 * np.hypot(theta1[..., 1], theta1[..., 2]),
    }


def _inversion_interval(
    replicates: np.ndarray, estimate: float, level: float
) -> tuple[float, float]:
    """Interval on the inversion from bootstrap replicates: the hull of three intervals.

    The hypot term is biased upward when the fringe difference is small compared with its
    noise, and the resampled values are shifted up once more, so the plain percentile
    interval misses low. Efron's bias-corrected percentile (BC) interval undoes that shift
    from the fraction of replicates below the estimate; the basic (reflected) interval
    undoes it to first order; the normal interval (estimate +- z sd) holds at very small
    counts, where the replicate distribution is coarse and skewed. Where the bootstrap is
    well behaved the three agree; taking their hull keeps coverage near the stated level
    in every regime tried (see tests/test_fringe.py).
    """
    count = replicates.size
    below = np.count_nonzero(replicates < estimate) + 0.5 * np.count_nonzero(replicates == estimate)
    fraction = np.clip(below / count, 1.0 / (count + 1.0), count / (count + 1.0))
    z0 = special.ndtri(fraction)
    z = special.ndtri(0.5 + level / 2.0)
    tail = (1.0 - level) / 2.0
    bc_low, bc_high, q_low, q_high = np.quantile(
        replicates, [special.ndtr(2.0 * z0 - z), special.ndtr(2.0 * z0 + z), tail, 1.0 - tail]
    )
    spread = z * float(np.std(replicates, ddof=1))
    low = min(bc_low, 2.0 * estimate - q_high, estimate - spread)
    high = max(bc_high, 2.0 * estimate - q_low, estimate + spread)
    return float(low), float(high)


def estimate_inversion(
    empty: FringeData,
    one_photon: FringeData,
    *,
    confidence: float = 0.95,
    seed: int = 0,
    resamples: int = DEFAULT_RESAMPLES,
) -> InversionEstimate:
    """Estimate the fringe inversion, photon phase shift, contrasts and absorption.

    Each field's fringe is fitted with :func:`fit_fringe`. Uncertainties come from a
    parametric bootstrap: ``resamples`` sets of g counts are drawn from binomials at the
    fitted fringe and the observed detected totals, and each is refitted with the same
    estimator (weights included), vectorised as batched 3x3 solves. The inversion interval
    is the hull of the bias-corrected percentile, basic and normal bootstrap intervals
    (the ``hypot`` term is biased upward at low signal; see ``_inversion_interval``),
    clipped to the physical range [-1, 1]; an estimate beyond that range (fringes fitted at few
    phases can overshoot [0, 1]) is brought to its edge, inside its interval. Standard errors are
    bootstrap standard deviations (the phase shift's from wrapped differences).

    Parameters
    ----------
    empty, one_photon : FringeData
        Counts for the empty and the one-photon field (phases may differ between them).
    confidence : float
        Level of the two-sided intervals, in (0, 1).
    seed : int
        Seed of the bootstrap generator (the result is a pure function of the arguments).
    resamples : int
        Bootstrap resamples, at least 100.

    Returns
    -------
    InversionEstimate
        If either field has atoms at fewer than 3 distinct phases, the fringe is not
        determined: the point values are computed from what there is (0 where nothing is),
        the intervals span the physical range and the standard errors are those of a value
        spread uniformly over it, with ``identified=False``.

    Raises
    ------
    EstimationError
        Input that is not :class:`FringeData`, a confidence outside (0, 1), or a resample
        count below 100.
    """
    _check_pair(empty, one_photon)
    level = _check_confidence(confidence)
    if isinstance(resamples, bool) or not isinstance(resamples, (int, np.integer)) or resamples < 100:
        raise EstimationError(f"resamples: expected an integer >= 100, got {resamples!r}")
    common = _common_terms(empty, one_photon, level, int(resamples))
    if not (_identified(empty) and _identified(one_photon)):
        return _uninformed_estimate(empty, one_photon, common)
    return _bootstrap_estimate(empty, one_photon, level, seed, int(resamples), common)


def _common_terms(
    empty: FringeData, one_photon: FringeData, level: float, resamples: int
) -> dict[str, Any]:
    """What every estimate carries, determined fringe or not: the absorption with its Wilson
    interval, the detected totals, the level and the resample count."""
    detected0 = int(empty.detected.sum())
    detected1 = int(one_photon.detected.sum())
    absorbed = int(one_photon.e.sum())
    absorption_low, absorption_high = proportion_interval(absorbed, detected1, level, "wilson")
    absorption = absorbed / detected1 if detected1 > 0 else 0.5
    return {
        "absorption": float(absorption),
        "absorption_low": float(absorption_low),
        "absorption_high": float(absorption_high),
        "detected_empty": detected0,
        "detected_one_photon": detected1,
        "confidence": level,
        "resamples": resamples,
    }


def _bootstrap_estimate(
    empty: FringeData,
    one_photon: FringeData,
    level: float,
    seed: int,
    resamples: int,
    common: dict[str, Any],
) -> InversionEstimate:
    """The estimate of two determined fringes: both fitted, then the parametric bootstrap
    (see :func:`estimate_inversion`)."""
    fit0 = fit_fringe(empty)
    fit1 = fit_fringe(one_photon)
    rng = np.random.default_rng(seed)
    # Ordering hazard: both fields draw from one generator, the empty field first.
    g0 = _resample_g(rng, fit0, empty, resamples)
    g1 = _resample_g(rng, fit1, one_photon, resamples)
    theta0 = _fit_batch(empty.ramsey_phase, g0, empty.detected)
    theta1 = _fit_batch(one_photon.ramsey_phase, g1, one_photon.detected)
    boot = _fringe_quantities(theta0, theta1)
    point = _fringe_quantities(fit0.coefficients, fit1.coefficients)

    raw = float(point["inversion"])
    low, high = _inversion_interval(boot["inversion"], raw, level)
    # The fitted sinusoids are not held to [0, 1], so fringes measured at few phases can give an
    # inversion beyond the physical range: the estimate is brought to the nearest physical value,
    # and the interval, clipped to the range, holds it.
    inversion = min(max(raw, -1.0), 1.0)
    low = min(max(low, -1.0), inversion)
    high = max(min(high, 1.0), inversion)
    shift = float(point["phase1"] - point["phase0"])
    shift_replicates = boot["phase1"] - boot["phase0"]
    return InversionEstimate(
        inversion=inversion,
        inversion_low=float(low),
        inversion_high=float(high),
        inversion_stderr=float(np.std(boot["inversion"], ddof=1)),
        phase_shift=_mod_two_pi(shift),
        phase_shift_stderr=float(np.sqrt(np.mean(_wrap(shift_replicates - shift) ** 2))),
        contrast_empty=float(point["contrast0"]),
        contrast_empty_stderr=float(np.std(boot["contrast0"], ddof=1)),
        contrast_one_photon=float(point["contrast1"]),
        contrast_one_photon_stderr=float(np.std(boot["contrast1"], ddof=1)),
        chi2_empty=fit0.chi2,
        dof_empty=fit0.dof,
        chi2_one_photon=fit1.chi2,
        dof_one_photon=fit1.dof,
        identified=True,
        **common,
    )


def inversion_contrast_covariance(empty: FringeFit, one_photon: FringeFit) -> float:
    """Covariance of the inversion estimate with the empty fringe's contrast estimate.

    Both are read from the same empty fringe: ``I = (a1 - a0) + hypot(b1 - b0, c1 - c0)`` and
    ``C0 = 2 hypot(b0, c0)``, so the noise of ``theta0 = (a0, b0, c0)`` moves both. The two
    fields' fits are independent (separate atoms), so by the first-order (multivariate) delta
    method (G. Casella and R. L. Berger, *Statistical Inference*, 2nd ed., 2002, section
    5.5.4)::

        cov(I, C0) = grad0(I)^T Sigma0 grad0(C0),
        grad0(I)  = (-1, -(b1 - b0) / h, -(c1 - c0) / h),   h = hypot(b1 - b0, c1 - c0),
        grad0(C0) = (0, 2 b0 / rho0, 2 c0 / rho0),          rho0 = hypot(b0, c0),

    with ``Sigma0`` the empty fit's covariance ``(X^T W X)^-1`` (:func:`fit_fringe`). For an
    inverted fringe (photon phase shift pi) and phases spread evenly over the circle it is about
    half the contrast's variance: see :func:`shared_fringe_covariance`.

    Raises
    ------
    EstimationError
        A fringe of zero amplitude or two identical fringes (the gradient is not defined).
    """
    theta0 = np.asarray(empty.coefficients, dtype=float)
    theta1 = np.asarray(one_photon.coefficients, dtype=float)
    delta = theta1 - theta0
    h = math.hypot(delta[1], delta[2])
    rho0 = math.hypot(theta0[1], theta0[2])
    if h <= 0.0 or rho0 <= 0.0:
        raise EstimationError("inversion_contrast_covariance: expected an empty fringe of nonzero "
                              f"amplitude ({rho0!r}) differing from the one-photon fringe ({h!r})")
    grad_inversion = np.array([-1.0, -delta[1] / h, -delta[2] / h])
    grad_contrast = np.array([0.0, 2.0 * theta0[1] / rho0, 2.0 * theta0[2] / rho0])
    return float(grad_inversion @ np.asarray(empty.covariance, dtype=float) @ grad_contrast)


def shared_fringe_covariance(contrast_empty: float, contrast_empty_stderr: float,
                             contrast_one_photon: float, phase_shift: float) -> float:
    """:func:`inversion_contrast_covariance` from a point's summary (no fit needed).

    With phases spread evenly over the circle and near-equal weights, the empty fit's
    covariance is isotropic, ``Sigma0 = diag(s_a^2, s^2, s^2)`` (the design's cosine and sine
    columns are orthogonal to each other and to the constant), so ``var(C0) = 4 s^2`` and the
    delta method gives::

        cov(I, C0) = 2 s^2 cos(angle) = var(C0) / 2 * (C0 - C1 cos(psi)) / hypot(C0 - C1 cos(psi), C1 sin(psi))

    with ``psi`` the photon phase shift (rad): the angle is that between the empty fringe's
    phasor and the difference of the two fringes', 0 for an inverted fringe (``psi = pi``),
    where the covariance is half the contrast's variance (the inversion moves half a unit per
    unit of contrast). Zero where the two fringes coincide (the gradient is not defined).

    Parameters
    ----------
    contrast_empty, contrast_one_photon : float
        Peak-to-peak contrasts ``C0, C1`` (>= 0).
    contrast_empty_stderr : float
        Standard error of ``C0`` (>= 0).
    phase_shift : float
        Photon phase shift ``psi`` (rad).
    """
    values = (contrast_empty, contrast_empty_stderr, contrast_one_photon, phase_shift)
    if not all(math.isfinite(float(v)) for v in values) or contrast_empty_stderr < 0.0:
        raise EstimationError("shared_fringe_covariance: expected finite contrasts, phase and a "
                              f"stderr >= 0, got {values!r}")
    along = float(contrast_empty) - float(contrast_one_photon) * math.cos(phase_shift)
    across = float(contrast_one_photon) * math.sin(phase_shift)
    norm = math.hypot(along, across)
    if norm <= 0.0:
        return 0.0
    return 0.5 * float(contrast_empty_stderr) ** 2 * along / norm


def _uninformed_estimate(
    empty: FringeData, one_photon: FringeData, common: dict[str, Any]
) -> InversionEstimate:
    """The estimate when a fringe is not determined: point values from the mean levels only."""
    means = []
    for data in (empty, one_photon):
        n = int(data.detected.sum())
        means.append(float(data.g.sum()) / n if n > 0 else 0.5)
    inversion = float(np.clip(means[1] - means[0], -1.0, 1.0))
    return InversionEstimate(
        inversion=inversion,
        inversion_low=-1.0,
        inversion_high=1.0,
        inversion_stderr=_UNINFORMED_INVERSION_STDERR,
        phase_shift=0.0,
        phase_shift_stderr=_UNINFORMED_ANGLE_STDERR,
        contrast_empty=0.0,
        contrast_empty_stderr=_UNINFORMED_CONTRAST_STDERR,
        contrast_one_photon=0.0,
        contrast_one_photon_stderr=_UNINFORMED_CONTRAST_STDERR,
        chi2_empty=0.0,
        dof_empty=0,
        chi2_one_photon=0.0,
        dof_one_photon=0,
        identified=False,
        **common,
    )
