"""The search's vocabulary: the space, what is measured and proposed, and the strategies'
interface (pure, no I/O).

:class:`Dimension` and :class:`SearchSpace` (the box and its unit cube), :class:`Observation`
and :class:`Recommendation`, :data:`Purpose` (why a point is measured), :class:`PointResult`
(everything the fringe pair measured at a point) and :class:`Proposal`, the :class:`Strategy`
interface every strategy follows, and :class:`SearchRecord` (the bookkeeping of the results
told, shared by the strategies). :mod:`autotune.analysis.search` describes the interface and
re-exports these.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any, Literal, Protocol, runtime_checkable

import numpy as np
from scipy import special

from autotune.errors import ValueRefused
from autotune.schema import is_number

__all__ = [
    "Dimension",
    "SearchSpace",
    "Observation",
    "Recommendation",
    "Purpose",
    "PURPOSES",
    "PointResult",
    "Proposal",
    "Strategy",
    "SearchRecord",
    "StrategyKind",
]

StrategyKind = Literal["bayesian", "grid", "coordinate", "random", "phase_lock"]

Purpose = Literal["search", "lock", "velocity", "relock", "check", "correct", "verify"]
"""Why a point is measured (journaled with it).

``"search"``: a point of a search plan (every strategy; the phase lock's Gaussian-process
fallback); ``"lock"``: a detuning step of the phase lock; ``"velocity"``: a velocity step of
the phase lock; ``"relock"``: the lock's detuning re-centred at the chosen velocity with fresh
data; ``"check"``: a retune's measurement at the last good set-points; ``"correct"``: a
corrected set-point that the loop measures at verification precision (it is a verification);
``"verify"``: the loop's verification at the recommendation (only ever observed, never
proposed).
"""

PURPOSES: tuple[str, ...] = ("search", "lock", "velocity", "relock", "check", "correct", "verify")


# --------------------------------------------------------------------------------------------
# Space
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Dimension:
    """One set-point axis of the search box.

    Parameters
    ----------
    name : str
        Set-point name (``"velocity"``, ``"detuning"``).
    low, high : float
        Bounds in the set-point's SI unit (m/s, Hz), finite, ``low < high``.
    """

    name: str
    low: float
    high: float

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise ValueRefused(f"Dimension.name: expected a non-empty string, got {self.name!r}")
        for attr in ("low", "high"):
            value = getattr(self, attr)
            if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)):
                raise ValueRefused(f"Dimension {self.name!r}: {attr}: expected a number, got {value!r}")
            if not math.isfinite(float(value)):
                raise ValueRefused(f"Dimension {self.name!r}: {attr}: expected a finite number, got {value!r}")
            object.__setattr__(self, attr, float(value))
        if not self.low < self.high:
            raise ValueRefused(
                f"Dimension {self.name!r}: expected low < high, got low={self.low!r}, high={self.high!r}"
            )

    @property
    def width(self) -> float:
        """``high - low``, in the set-point's unit."""
        return self.high - self.low


@dataclass(frozen=True)
class SearchSpace:
    """A box of set-points: an ordered tuple of :class:`Dimension` with unique names.

    Points are mappings ``{name: value}`` with exactly the space's names.
    """

    dimensions: tuple[Dimension, ...]

    def __post_init__(self) -> None:
        dims = tuple(self.dimensions)
        if not dims:
            raise ValueRefused("SearchSpace.dimensions: expected at least one Dimension, got none")
        for dim in dims:
            if not isinstance(dim, Dimension):
                raise ValueRefused(f"SearchSpace.dimensions: expected Dimension objects, got {dim!r}")
        names = [dim.name for dim in dims]
        duplicates = sorted({name for name in names if names.count(name) > 1})
        if duplicates:
            raise ValueRefused(f"SearchSpace.dimensions: expected unique names, got duplicates {duplicates}")
        object.__setattr__(self, "dimensions", dims)

    @property
    def names(self) -> tuple[str, ...]:
        """Dimension names, in order."""
        return tuple(dim.name for dim in self.dimensions)

    @property
    def lows(self) -> np.ndarray:
        """Lower bounds, in order."""
        return np.array([dim.low for dim in self.dimensions])

    @property
    def highs(self) -> np.ndarray:
        """Upper bounds, in order."""
        return np.array([dim.high for dim in self.dimensions])

    def to_array(self, point: Mapping[str, float]) -> np.ndarray:
        """The point's values in dimension order; raises ValueError on missing/extra/non-finite."""
        if not isinstance(point, Mapping):
            raise ValueRefused(f"point: expected a mapping {{name: value}}, got {point!r}")
        missing = [name for name in self.names if name not in point]
        extra = sorted(set(point) - set(self.names))
        if missing or extra:
            raise ValueRefused(f"point: expected keys {list(self.names)}, missing {missing}, unexpected {extra}")
        values = []
        for name in self.names:
            value = point[name]
            if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)):
                raise ValueRefused(f"point[{name!r}]: expected a number, got {value!r}")
            if not math.isfinite(float(value)):
                raise ValueRefused(f"point[{name!r}]: expected a finite number, got {value!r}")
            values.append(float(value))
        return np.array(values)

    def to_point(self, values: Iterable[float]) -> dict[str, float]:
        """``{name: float}`` from values in dimension order."""
        array = np.asarray(list(values), dtype=float)
        if array.shape != (len(self.dimensions),):
            raise ValueRefused(f"values: expected {len(self.dimensions)} numbers, got shape {array.shape}")
        return {name: float(v) for name, v in zip(self.names, array)}

    def contains(self, point: Mapping[str, float]) -> bool:
        """True if every value lies within its bounds (inclusive)."""
        values = self.to_array(point)
        return bool(np.all(values >= self.lows) and np.all(values <= self.highs))

    def clip(self, point: Mapping[str, float]) -> dict[str, float]:
        """The nearest point of the box."""
        return self.to_point(np.clip(self.to_array(point), self.lows, self.highs))

    def to_unit(self, point: Mapping[str, float]) -> np.ndarray:
        """Coordinates in the unit cube, ``(value - low) / (high - low)``."""
        return (self.to_array(point) - self.lows) / (self.highs - self.lows)

    def from_unit(self, unit: Iterable[float]) -> dict[str, float]:
        """The point at unit-cube coordinates (clipped to [0, 1] first)."""
        u = np.clip(np.asarray(list(unit), dtype=float), 0.0, 1.0)
        return self.to_point(self.lows + u * (self.highs - self.lows))


# --------------------------------------------------------------------------------------------
# Interface
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Observation:
    """One measured result: a point, its value (to maximise), the value's standard error and,
    if known, the rig clock ``clock_s`` (s) at the middle of the measurement."""

    point: Mapping[str, float]
    value: float
    stderr: float
    clock_s: float | None = None


@dataclass(frozen=True)
class Recommendation:
    """The point a strategy would choose now, with its predicted value and standard error.

    For :class:`BayesianSearch` the value is the surrogate's posterior mean and the stderr its
    posterior standard deviation; for the other strategies the best observed result.
    """

    point: dict[str, float]
    value: float
    stderr: float


def _check_purpose(purpose: Any) -> str:
    if purpose not in PURPOSES:
        raise ValueRefused(f"purpose: expected one of {list(PURPOSES)}, got {purpose!r}")
    return str(purpose)


@dataclass(frozen=True)
class PointResult:
    """Everything one measured point (a fringe pair) says, as plain floats in SI units.

    Build it from a fringe estimate with :meth:`from_estimate`. Every field is checked on
    construction: numbers finite, standard errors >= 0, ``phase_shift`` in [0, 2 pi),
    ``absorption`` in [0, 1], ``shots`` an integer >= 0.

    Attributes
    ----------
    inversion, inversion_stderr : float
        Fringe inversion (docs/physics.md section 5) and its standard error.
    phase_shift, phase_shift_stderr : float
        Photon phase shift, the angle between the one-photon and the empty fringe (rad, in
        [0, 2 pi)), and its standard error (rad).
    absorption, absorption_stderr : float
        P_e(one photon) and its standard error.
    contrast_empty, contrast_empty_stderr : float
        Peak-to-peak contrast of the empty field's fringe and its standard error.
    contrast_one_photon, contrast_one_photon_stderr : float
        The same for the one-photon field.
    identified : bool
        False when a fringe was not determined (too few phases with atoms): the phase shift
        and contrasts then carry no information.
    clock_s : float or None
        Rig clock at the middle of the measurement (s), if known.
    shots : int
        Shots of the whole point (both fields, every Ramsey phase).
    """

    inversion: float
    inversion_stderr: float
    phase_shift: float
    phase_shift_stderr: float
    absorption: float
    absorption_stderr: float
    contrast_empty: float
    contrast_empty_stderr: float
    contrast_one_photon: float
    contrast_one_photon_stderr: float
    identified: bool
    clock_s: float | None
    shots: int

    def __post_init__(self) -> None:
        for name in ("inversion", "inversion_stderr", "phase_shift", "phase_shift_stderr",
                     "absorption", "absorption_stderr", "contrast_empty", "contrast_empty_stderr",
                     "contrast_one_photon", "contrast_one_photon_stderr"):
            value = getattr(self, name)
            if not is_number(value) or not math.isfinite(float(value)):
                raise ValueRefused(f"PointResult.{name}: expected a finite number, got {value!r}")
            object.__setattr__(self, name, float(value))
            if name.endswith("_stderr") and float(value) < 0.0:
                raise ValueRefused(f"PointResult.{name}: expected a number >= 0, got {value!r}")
        if not 0.0 <= self.phase_shift < 2.0 * math.pi:
            raise ValueRefused(f"PointResult.phase_shift: expected rad in [0, 2 pi), got {self.phase_shift!r}")
        if not 0.0 <= self.absorption <= 1.0:
            raise ValueRefused(f"PointResult.absorption: expected a probability in [0, 1], got {self.absorption!r}")
        if not isinstance(self.identified, (bool, np.bool_)):
            raise ValueRefused(f"PointResult.identified: expected a bool, got {self.identified!r}")
        object.__setattr__(self, "identified", bool(self.identified))
        if self.clock_s is not None:
            if not is_number(self.clock_s) or not math.isfinite(float(self.clock_s)):
                raise ValueRefused(f"PointResult.clock_s: expected None or a finite number of seconds, got {self.clock_s!r}")
            object.__setattr__(self, "clock_s", float(self.clock_s))
        if isinstance(self.shots, bool) or not isinstance(self.shots, (int, np.integer)) or self.shots < 0:
            raise ValueRefused(f"PointResult.shots: expected an integer >= 0, got {self.shots!r}")
        object.__setattr__(self, "shots", int(self.shots))

    @classmethod
    def from_estimate(cls, estimate: Any, *, clock_s: float | None, shots: int) -> PointResult:
        """Read an :class:`autotune.analysis.fringe.InversionEstimate` (or any object with its attributes).

        The absorption's standard error is the half width of its Wilson interval over ``z``,
        ``(absorption_high - absorption_low) / (2 z)`` with ``z`` the two-sided normal quantile
        at the estimate's ``confidence``.

        Parameters
        ----------
        estimate : InversionEstimate-like
            Read by attribute: ``inversion``, ``inversion_stderr``, ``phase_shift``,
            ``phase_shift_stderr``, ``absorption``, ``absorption_low``, ``absorption_high``,
            ``contrast_empty(_stderr)``, ``contrast_one_photon(_stderr)``, ``identified``,
            ``confidence``.
        clock_s : float or None
            Rig clock at the middle of the measurement (s).
        shots : int
            Shots of the whole point.

        Raises
        ------
        ValueError
            A missing attribute or a value that :class:`PointResult` refuses.
        """
        names = ("inversion", "inversion_stderr", "phase_shift", "phase_shift_stderr", "absorption",
                 "absorption_low", "absorption_high", "contrast_empty", "contrast_empty_stderr",
                 "contrast_one_photon", "contrast_one_photon_stderr", "identified", "confidence")
        missing = [name for name in names if not hasattr(estimate, name)]
        if missing:
            raise ValueRefused(f"estimate: expected an InversionEstimate-like object, missing attributes {missing}")
        confidence = estimate.confidence
        if not is_number(confidence) or not 0.0 < float(confidence) < 1.0:
            raise ValueRefused(f"estimate.confidence: expected a number in (0, 1), got {confidence!r}")
        low, high = estimate.absorption_low, estimate.absorption_high
        for name, value in (("absorption_low", low), ("absorption_high", high)):
            if not is_number(value) or not math.isfinite(float(value)):
                raise ValueRefused(f"estimate.{name}: expected a finite number, got {value!r}")
        if float(high) < float(low):
            raise ValueRefused(f"estimate: expected absorption_low <= absorption_high, got {low!r} > {high!r}")
        z = float(special.ndtri(0.5 + 0.5 * float(confidence)))
        return cls(
            inversion=estimate.inversion,
            inversion_stderr=estimate.inversion_stderr,
            phase_shift=estimate.phase_shift,
            phase_shift_stderr=estimate.phase_shift_stderr,
            absorption=estimate.absorption,
            absorption_stderr=(float(high) - float(low)) / (2.0 * z),
            contrast_empty=estimate.contrast_empty,
            contrast_empty_stderr=estimate.contrast_empty_stderr,
            contrast_one_photon=estimate.contrast_one_photon,
            contrast_one_photon_stderr=estimate.contrast_one_photon_stderr,
            identified=estimate.identified,
            clock_s=clock_s,
            shots=shots,
        )

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping of every field."""
        return dict(self.__dict__)


@dataclass(frozen=True)
class Proposal:
    """The next point a strategy wants measured, and why.

    Attributes
    ----------
    point : dict
        Set-points ``{name: value}`` in SI units (m/s, Hz).
    purpose : Purpose
        Why it is measured (see :data:`Purpose`).
    shots_per_phase : int or None
        Shots per field and Ramsey phase; ``None`` means the loop's configured default for
        that purpose (``measurement.shots_per_phase`` for a search point, the check's
        precision for ``"check"``, the verification's for ``"correct"``).
    reason : str
        A sentence with the numbers behind the choice, for the journal.
    """

    point: dict[str, float]
    purpose: str
    shots_per_phase: int | None
    reason: str

    def __post_init__(self) -> None:
        if not isinstance(self.point, Mapping) or not self.point:
            raise ValueRefused(f"Proposal.point: expected a non-empty mapping {{name: value}}, got {self.point!r}")
        point = {}
        for name, value in self.point.items():
            if not isinstance(name, str) or not is_number(value) or not math.isfinite(float(value)):
                raise ValueRefused(f"Proposal.point[{name!r}]: expected a finite number, got {value!r}")
            point[name] = float(value)
        object.__setattr__(self, "point", point)
        try:
            _check_purpose(self.purpose)
        except ValueError as exc:
            raise ValueRefused(f"Proposal.{exc}") from None
        if self.shots_per_phase is not None and (
                isinstance(self.shots_per_phase, bool) or not isinstance(self.shots_per_phase, (int, np.integer))
                or self.shots_per_phase < 1):
            raise ValueRefused(f"Proposal.shots_per_phase: expected None or an integer >= 1, got {self.shots_per_phase!r}")
        if self.shots_per_phase is not None:
            object.__setattr__(self, "shots_per_phase", int(self.shots_per_phase))
        if not isinstance(self.reason, str) or not self.reason:
            raise ValueRefused(f"Proposal.reason: expected a non-empty sentence, got {self.reason!r}")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping of every field."""
        return {"point": dict(self.point), "purpose": self.purpose,
                "shots_per_phase": self.shots_per_phase, "reason": self.reason}


@runtime_checkable
class Strategy(Protocol):
    """What the closed loop needs from a search strategy (values are maximised)."""

    name: str

    @property
    def n_told(self) -> int:
        """Results told through :meth:`tell` (a warm start is not counted)."""
        ...

    def ask(self, *, clock_s: float | None = None) -> dict[str, float]:
        """The next point to measure at rig clock ``clock_s`` (s); the same point until a tell."""
        ...

    def tell(self, point: Mapping[str, float], value: float, stderr: float, *,
             clock_s: float | None = None) -> None:
        """Record the measured ``value`` (to maximise) and its ``stderr`` at ``point``.

        ``clock_s`` is the rig clock (s) at the middle of that measurement, if known.
        """
        ...

    def recommend(self, *, clock_s: float | None = None) -> Recommendation:
        """The point to choose at rig clock ``clock_s`` (s) and its predicted value."""
        ...

    def exhausted(self) -> bool:
        """True when a finite design has no point left to ask."""
        ...

    def converged(self, *, clock_s: float | None = None) -> bool:
        """True when the strategy's own stopping test passes at rig clock ``clock_s`` (s)."""
        ...

    def propose(self, *, clock_s: float | None = None) -> Proposal:
        """The next point to measure at rig clock ``clock_s`` (s), its purpose, shots and reason.

        The same proposal until the next :meth:`observe`.
        """
        ...

    def observe(self, point: Mapping[str, float], result: PointResult, *,
                purpose: str = "search") -> None:
        """Record everything measured at ``point`` (``purpose`` as proposed, or ``"verify"``)."""
        ...


class SearchRecord:
    """Shared bookkeeping: checks and stores told results."""

    name = "base"

    def __init__(self, space: SearchSpace) -> None:
        if not isinstance(space, SearchSpace):
            raise ValueRefused(f"space: expected a SearchSpace, got {type(space).__name__}")
        self.space = space
        self._units: list[np.ndarray] = []
        self._values: list[float] = []
        self._stderrs: list[float] = []

    @property
    def n_told(self) -> int:
        """Results told through :meth:`tell`."""
        return len(self._values)

    def _check_result(self, point: Mapping[str, float], value: float, stderr: float) -> np.ndarray:
        values = self.space.to_array(point)
        # Set-points read back from a rig may differ from the request in the last digits.
        slack = 1e-9 * (self.space.highs - self.space.lows)
        if np.any(values < self.space.lows - slack) or np.any(values > self.space.highs + slack):
            raise ValueRefused(
                f"point: expected within {dict(zip(self.space.names, zip(self.space.lows, self.space.highs)))}, "
                f"got {dict(point)}"
            )
        for label, number in (("value", value), ("stderr", stderr)):
            if isinstance(number, bool) or not isinstance(number, (int, float, np.floating, np.integer)):
                raise ValueRefused(f"{label}: expected a finite number, got {number!r}")
            if not math.isfinite(float(number)):
                raise ValueRefused(f"{label}: expected a finite number, got {number!r}")
        if float(stderr) < 0.0:
            raise ValueRefused(f"stderr: expected >= 0, got {stderr!r}")
        return np.clip((values - self.space.lows) / (self.space.highs - self.space.lows), 0.0, 1.0)

    @staticmethod
    def _check_clock(clock_s: float | None) -> float | None:
        if clock_s is None:
            return None
        if isinstance(clock_s, bool) or not isinstance(clock_s, (int, float, np.floating, np.integer)) or not math.isfinite(
                float(clock_s)):
            raise ValueRefused(f"clock_s: expected None or a finite number of seconds, got {clock_s!r}")
        return float(clock_s)

    def _store(self, unit: np.ndarray, value: float, stderr: float) -> None:
        self._units.append(unit)
        self._values.append(float(value))
        self._stderrs.append(float(stderr))

    def propose(self, *, clock_s: float | None = None) -> Proposal:
        """:meth:`ask` as a :class:`Proposal`: purpose ``"search"``, the loop's default shots."""
        point = self.ask(clock_s=clock_s)  # type: ignore[attr-defined]
        return Proposal(point, "search", None,
                        f"{self.name}: next point of its plan after {self.n_told} results")

    def observe(self, point: Mapping[str, float], result: PointResult, *,
                purpose: str = "search") -> None:
        """Tell the inversion of a search point: ``tell(point, inversion, inversion_stderr)``.

        These strategies learn from their own search points only: a result with any other
        purpose (a check, a verification) is checked and then ignored, so that a fixed design
        does not count it as its next point.
        """
        _check_purpose(purpose)
        if not isinstance(result, PointResult):
            raise ValueRefused(f"result: expected a PointResult, got {type(result).__name__}")
        if purpose != "search":
            return
        self.tell(point, result.inversion, result.inversion_stderr,  # type: ignore[attr-defined]
                  clock_s=result.clock_s)

    def _best_observed(self) -> Recommendation:
        if not self._values:
            raise RuntimeError(f"{self.name}: nothing told yet, no recommendation")
        best = int(np.argmax(self._values))
        return Recommendation(self.space.from_unit(self._units[best]), self._values[best], self._stderrs[best])
