"""The scan strategies: a grid, one dimension at a time, and random points (pure, no I/O).

:class:`GridScan`, :class:`CoordinateScan` and :class:`RandomSearch` are fixed designs whose
k-th point depends only on the first k results, so a resumed run re-told the journal's results
carries on the same plan. They follow :class:`autotune.analysis.search_types.Strategy`;
:mod:`autotune.analysis.search` re-exports them.
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping

import numpy as np

from autotune.analysis.search_types import Recommendation, SearchRecord, SearchSpace
from autotune.errors import ValueRefused

__all__ = ["GridScan", "CoordinateScan", "RandomSearch"]



class _FixedDesign(SearchRecord):
    """A strategy whose k-th point depends only on the first k results."""

    def _size(self) -> int:
        raise NotImplementedError

    def _point(self, index: int) -> np.ndarray:
        raise NotImplementedError

    def ask(self, *, clock_s: float | None = None) -> dict[str, float]:
        """The next design point; raises RuntimeError once :meth:`exhausted` (``clock_s`` unused)."""
        self._check_clock(clock_s)
        if self.exhausted():
            raise RuntimeError(f"{self.name}: the design of {self._size()} points is exhausted; check exhausted()")
        return self.space.from_unit(self._point(self.n_told))

    def tell(self, point: Mapping[str, float], value: float, stderr: float, *,
             clock_s: float | None = None) -> None:
        """Record a result (value maximised); ``clock_s`` is checked, then unused."""
        self._check_clock(clock_s)
        self._store(self._check_result(point, value, stderr), value, stderr)

    def recommend(self, *, clock_s: float | None = None) -> Recommendation:
        """The best observed result (``clock_s`` unused)."""
        self._check_clock(clock_s)
        return self._best_observed()

    def exhausted(self) -> bool:
        """True once every design point has been told."""
        return self.n_told >= self._size()

    def converged(self, *, clock_s: float | None = None) -> bool:
        """Same as :meth:`exhausted`: a fixed design has no other stopping test (``clock_s`` unused)."""
        self._check_clock(clock_s)
        return self.exhausted()


def _counts_per_dimension(space: SearchSpace, points_per_dimension: int | Mapping[str, int], minimum: int) -> list[int]:
    if isinstance(points_per_dimension, Mapping):
        unknown = sorted(set(points_per_dimension) - set(space.names))
        if unknown:
            raise ValueRefused(f"points_per_dimension: unknown dimensions {unknown}")
        counts = [points_per_dimension.get(name, None) for name in space.names]
        if any(c is None for c in counts):
            raise ValueRefused(f"points_per_dimension: expected a count for each of {list(space.names)}")
    else:
        counts = [points_per_dimension] * len(space.dimensions)
    for name, count in zip(space.names, counts):
        if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < minimum:
            raise ValueRefused(f"points_per_dimension[{name!r}]: expected an integer >= {minimum}, got {count!r}")
    return [int(c) for c in counts]


def _line(count: int) -> np.ndarray:
    return np.linspace(0.0, 1.0, count) if count > 1 else np.array([0.5])


class GridScan(_FixedDesign):
    """The full grid over the box (end points included), then the best observed point.

    Parameters
    ----------
    space : SearchSpace
    points_per_dimension : int or mapping name -> int
        Grid points along each dimension (>= 1; one point is the centre). The last
        dimension varies fastest.
    """

    name = "grid"

    def __init__(self, space: SearchSpace, points_per_dimension: int | Mapping[str, int]) -> None:
        super().__init__(space)
        counts = _counts_per_dimension(space, points_per_dimension, 1)
        self._grid = np.array(list(itertools.product(*(_line(c) for c in counts))))

    def _size(self) -> int:
        return len(self._grid)

    def _point(self, index: int) -> np.ndarray:
        return self._grid[index]


class RandomSearch(_FixedDesign):
    """``n_points`` points drawn uniformly in the box from ``seed``, then the best observed point."""

    name = "random"

    def __init__(self, space: SearchSpace, seed: int, n_points: int) -> None:
        super().__init__(space)
        if isinstance(n_points, bool) or not isinstance(n_points, (int, np.integer)) or n_points < 1:
            raise ValueRefused(f"n_points: expected an integer >= 1, got {n_points!r}")
        self._design = np.random.default_rng(seed).uniform(size=(int(n_points), len(space.dimensions)))

    def _size(self) -> int:
        return len(self._design)

    def _point(self, index: int) -> np.ndarray:
        return self._design[index]


class CoordinateScan(_FixedDesign):
    """The hand method: line scans along one dimension at a time around the best so far.

    A round scans each dimension in order (velocity first, then detuning) with
    ``points_per_dimension`` equally spaced points, the other set-points held at the current
    point; after each line the current point moves to the best result of that line. Round
    ``r`` (from 0) scans a window of width ``narrowing**r`` times the full range, centred on
    the current point and shifted to stay inside the box: with the default ``narrowing=0.5``
    the window halves every round.

    Parameters
    ----------
    space : SearchSpace
    points_per_dimension : int or mapping name -> int
        Points per line scan (>= 2).
    rounds : int
        Rounds over all dimensions (>= 1).
    start : mapping, optional
        The first current point (default: the centre of the box).
    narrowing : float
        Window shrink factor per round, in (0, 1].
    """

    name = "coordinate"

    def __init__(
        self,
        space: SearchSpace,
        points_per_dimension: int | Mapping[str, int],
        rounds: int,
        start: Mapping[str, float] | None = None,
        narrowing: float = 0.5,
    ) -> None:
        super().__init__(space)
        self._counts = _counts_per_dimension(space, points_per_dimension, 2)
        if isinstance(rounds, bool) or not isinstance(rounds, (int, np.integer)) or rounds < 1:
            raise ValueRefused(f"rounds: expected an integer >= 1, got {rounds!r}")
        if not (isinstance(narrowing, (int, float)) and 0.0 < float(narrowing) <= 1.0):
            raise ValueRefused(f"narrowing: expected a number in (0, 1], got {narrowing!r}")
        self._rounds = int(rounds)
        self._narrowing = float(narrowing)
        if start is None:
            self._start = np.full(len(space.dimensions), 0.5)
        else:
            if not space.contains(start):
                raise ValueRefused(f"start: expected a point inside the space, got {dict(start)}")
            self._start = space.to_unit(start)
        # Line l covers told indices [self._offsets[l], self._offsets[l + 1]).
        per_round = list(self._counts)
        self._offsets = np.concatenate([[0], np.cumsum(per_round * self._rounds)])
        self._lines: list[np.ndarray] = []

    def _size(self) -> int:
        return int(self._offsets[-1])

    def _line_points(self, line: int) -> np.ndarray:
        while len(self._lines) <= line:
            index = len(self._lines)
            if index == 0:
                centre = self._start
            else:
                lo, hi = int(self._offsets[index - 1]), int(self._offsets[index])
                best = lo + int(np.argmax(self._values[lo:hi]))
                centre = self._units[best]
            dim = index % len(self._counts)
            width = self._narrowing ** (index // len(self._counts))
            low = min(max(centre[dim] - width / 2.0, 0.0), 1.0 - width)
            points = np.repeat(centre[None, :], self._counts[dim], axis=0)
            points[:, dim] = low + width * _line(self._counts[dim])
            self._lines.append(points)
        return self._lines[line]

    def _point(self, index: int) -> np.ndarray:
        line = int(np.searchsorted(self._offsets, index, side="right")) - 1
        return self._line_points(line)[index - int(self._offsets[line])]
