"""Build a search strategy by kind: the one place that knows every strategy.

It lives apart from :mod:`autotune.analysis.search` (the hand strategies and the Gaussian process) and
:mod:`autotune.analysis.guided` (the phase lock, which builds on :mod:`autotune.analysis.search`), so that
neither imports the other in a circle.
"""

from __future__ import annotations

from typing import Any

from autotune.analysis.guided import PhaseLockSearch
from autotune.analysis.search import (
    BayesianSearch,
    CoordinateScan,
    GridScan,
    RandomSearch,
    SearchSpace,
    Strategy,
    StrategyKind,
)
from autotune.errors import ValueRefused

__all__ = ["make_strategy"]


def make_strategy(kind: StrategyKind, space: SearchSpace, *, seed: int, **settings: Any) -> Strategy:
    """Build a strategy by kind.

    Parameters
    ----------
    kind : {"bayesian", "grid", "coordinate", "random", "phase_lock"}
    space : SearchSpace
    seed : int
        Used by the seeded strategies (bayesian, random, phase_lock); ignored by grid and
        coordinate.
    **settings
        Keyword arguments of the strategy's constructor (``points_per_dimension``,
        ``rounds``, ``n_points``, ``initial_points``, ...; for ``"phase_lock"``: ``start``,
        ``settings``, ``prior``, see :class:`autotune.analysis.guided.PhaseLockSearch`).
    """
    if kind == "phase_lock":
        try:
            return PhaseLockSearch(space, seed=seed, **settings)
        except TypeError as exc:
            raise ValueRefused(f"settings for {kind!r}: {exc}") from exc
    try:
        if kind == "bayesian":
            return BayesianSearch(space, seed=seed, **settings)
        if kind == "grid":
            return GridScan(space, **settings)
        if kind == "coordinate":
            return CoordinateScan(space, **settings)
        if kind == "random":
            return RandomSearch(space, seed, **settings)
    except TypeError as exc:
        raise ValueRefused(f"settings for {kind!r}: {exc}") from exc
    raise ValueRefused(f"kind: expected one of 'bayesian', 'grid', 'coordinate', 'random', 'phase_lock', got {kind!r}")
