"""Search strategies over the set-points: ask for a point, tell its measured value (pure, no I/O).

This is the only module that imports scikit-optimize (pinned to 0.10.2, unmaintained); no
skopt type appears in its public API, and ``tests/test_search.py`` holds the canary for an
upstream break.

Every strategy maximises the told ``value`` (the fringe inversion) and follows one
interface, :class:`Strategy`: ``ask()`` proposes a point, ``tell(point, value, stderr)``
records a measurement, ``recommend()`` gives the point to choose now, ``exhausted()`` says a
finite design is finished and ``converged()`` is the strategy's own stopping test.

A strategy that learns from more than the inversion speaks through ``propose()`` (a
:class:`Proposal`: the point, its purpose, its shots and the reason) and ``observe(point,
result, purpose=...)`` (a :class:`PointResult`: everything the fringe pair measured). Every
strategy has both: the ones here wrap ``ask``/``tell``; :class:`autotune.analysis.guided.PhaseLockSearch`
(``"phase_lock"``) is built on them.

The search's types and the interface live in :mod:`autotune.analysis.search_types`, the scan
strategies in :mod:`autotune.analysis.search_scans`; this module keeps the Gaussian-process
search (:class:`BayesianSearch`, the scikit-optimize adapter) and re-exports the others'
public names (``from autotune.analysis.search import PointResult`` works).

Resuming without saved state
----------------------------
Strategies keep no state that is not a function of their constructor arguments and of the
results told so far, in order. A run killed half-way is resumed by building the strategy
again with the same arguments (same seed, same initial points, same warm start) and
telling it the journal's results in their original order: the next ``ask()`` then carries
on the plan (the next grid or line-scan point, the next random point, or a point proposed
by a surrogate refitted on the same data). ``ask()`` does not advance anything by itself;
asking twice without a tell gives the same point.

Rig clocks
----------
Every method takes an optional keyword ``clock_s`` (rig clock, s): on ``tell`` the middle of
that measurement, on ``ask``/``recommend``/``converged`` "now". Only a
:class:`BayesianSearch` with a ``drift_dimension`` uses them (the others check and ignore
them); to resume it, re-tell the results with their original clocks.
"""

from __future__ import annotations

import functools
import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import special

from autotune.analysis.search_scans import CoordinateScan, GridScan, RandomSearch
from autotune.analysis.search_types import (
    PURPOSES,
    Dimension,
    Observation,
    PointResult,
    Proposal,
    Purpose,
    Recommendation,
    SearchRecord,
    SearchSpace,
    Strategy,
    StrategyKind,
)
from autotune.errors import ValueRefused

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
    "Convergence",
    "BayesianSearch",
    "GridScan",
    "CoordinateScan",
    "RandomSearch",
    "StrategyKind",
]

# Results after which the surrogate's hyperparameter fit starts from the previous fit.
_WARM_HYPERPARAMETERS_AFTER = 40
# Results (all with a rig clock) needed before a drift rate is estimated.
_DRIFT_MIN_RESULTS = 8

# --------------------------------------------------------------------------------------------
# Bayesian optimisation (the scikit-optimize adapter)
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Convergence:
    """Stopping test of :class:`BayesianSearch`, on its surrogate.

    Converged when all hold:

    - at least ``min_told`` results were told after the initial design;
    - the recommendation stayed within ``stable_distance`` (unit-cube Euclidean distance)
      of the present one over the last ``stable_tells`` tells;
    - the largest expected improvement over the candidate set is below
      ``expected_improvement`` (in the value's unit);
    - no candidate's upper bound ``mean + upper_bound_sigmas * std`` exceeds the
      recommended posterior mean by more than ``upper_bound_gap`` (value's unit): nowhere
      unexplored could plausibly beat the recommendation, which keeps the search from
      stopping on a lower ridge while a narrow peak is still possible.
    """

    expected_improvement: float = 1e-3
    upper_bound_gap: float = 0.03
    upper_bound_sigmas: float = 2.0
    stable_tells: int = 5
    stable_distance: float = 0.03
    min_told: int = 10

    def __post_init__(self) -> None:
        for attr in ("expected_improvement", "upper_bound_gap", "upper_bound_sigmas", "stable_distance"):
            value = getattr(self, attr)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not (math.isfinite(value) and value > 0):
                raise ValueRefused(f"Convergence.{attr}: expected a finite number > 0, got {value!r}")
        for attr, minimum in (("stable_tells", 1), ("min_told", 0)):
            value = getattr(self, attr)
            if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
                raise ValueRefused(f"Convergence.{attr}: expected an integer >= {minimum}, got {value!r}")


def _skopt():
    """Import the pieces of scikit-optimize used here (a failure names the pinned version)."""
    try:
        from sklearn.gaussian_process.kernels import ConstantKernel, Matern
        from skopt import Optimizer
        from skopt.learning import GaussianProcessRegressor
        from skopt.space import Real
    except ImportError as exc:  # pragma: no cover - environment problem
        raise ImportError("autotune.search needs scikit-optimize==0.10.2 and scikit-learn") from exc
    return Optimizer, GaussianProcessRegressor, ConstantKernel, Matern, Real


@functools.lru_cache(maxsize=32)
def _latin_design(dims: int, n: int, seed: int) -> tuple[tuple[float, ...], ...]:
    """The first design's ``n`` points in the unit cube: a Latin hypercube of ``dims`` axes
    whose centred discrepancy is lowered by random coordinate swaps, drawn from ``seed``.

    A pure function of its arguments, kept (as tuples, immutable) for the searches rebuilt in
    one process with the same seed (a resume, a study's repeats): the discrepancy optimisation
    takes seconds of CPU and gives the same points each time.
    """
    from scipy.stats import qmc  # scipy.stats loads here, not at import
    sampler = qmc.LatinHypercube(d=dims, optimization="random-cd", rng=np.random.default_rng(seed))
    return tuple(tuple(float(x) for x in row) for row in sampler.random(n))


def _gaussian_ei():
    from skopt.acquisition import gaussian_ei

    return gaussian_ei


def _as_observation(item: Any) -> Observation:
    if isinstance(item, Observation):
        return item
    if isinstance(item, Recommendation):
        return Observation(item.point, item.value, item.stderr)
    try:
        point, value, stderr, *clock = item
        if len(clock) > 1:
            raise ValueRefused("too many fields")
    except (TypeError, ValueError) as exc:
        raise ValueRefused(f"warm_start: expected (point, value, stderr[, clock_s]) items, got {item!r}") from exc
    return Observation(point, value, stderr, clock[0] if clock else None)


#: Fraction of the box width (per dimension) within which a point counts as at an edge.
_EDGE_MARGIN = 0.05


def _check_settings(space: SearchSpace, *, seed: Any, n_initial_points: Any, n_points: Any,
                    convergence: Any, candidates: Any, exploration: Any, drift_dimension: Any,
                    max_drift_rate: Any, drift_grid: Any) -> None:
    """Refuse a :class:`BayesianSearch` setting, naming it, before anything is built."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
        raise ValueRefused(f"seed: expected an integer, got {seed!r}")
    if isinstance(n_initial_points, bool) or not isinstance(n_initial_points, (int, np.integer)) or n_initial_points < 0:
        raise ValueRefused(f"n_initial_points: expected an integer >= 0, got {n_initial_points!r}")
    if n_points is not None and (isinstance(n_points, bool) or not isinstance(n_points, int) or n_points < 1):
        raise ValueRefused(f"n_points: expected None or an integer >= 1, got {n_points!r}")
    if not isinstance(convergence, Convergence):
        raise ValueRefused(f"convergence: expected a Convergence, got {convergence!r}")
    if isinstance(candidates, bool) or not isinstance(candidates, int) or candidates < 16:
        raise ValueRefused(f"candidates: expected an integer >= 16, got {candidates!r}")
    if isinstance(exploration, bool) or not isinstance(exploration, (int, float)) or not (
            math.isfinite(exploration) and exploration >= 0):
        raise ValueRefused(f"exploration: expected a finite number >= 0, got {exploration!r}")
    if drift_dimension is not None and drift_dimension not in space.names:
        raise ValueRefused(f"drift_dimension: expected None or one of {list(space.names)}, got {drift_dimension!r}")
    if isinstance(max_drift_rate, bool) or not isinstance(max_drift_rate, (int, float)) or not (
            math.isfinite(max_drift_rate) and max_drift_rate > 0):
        raise ValueRefused(f"max_drift_rate: expected a finite number > 0 (unit per second), got {max_drift_rate!r}")
    if isinstance(drift_grid, bool) or not isinstance(drift_grid, int) or drift_grid < 3 or drift_grid % 2 == 0:
        raise ValueRefused(f"drift_grid: expected an odd integer >= 3 (so that 0 is on it), got {drift_grid!r}")


def _first_design(space: SearchSpace, initial_points: Sequence[Mapping[str, float]],
                  n_initial_points: int, seed: int) -> np.ndarray:
    """The first points asked, in the unit cube: ``initial_points`` in order, then a Latin
    hypercube of ``n_initial_points`` from ``seed``."""
    dims = len(space.dimensions)
    design = []
    for k, point in enumerate(initial_points):
        if not space.contains(point):
            raise ValueRefused(f"initial_points[{k}]: expected a point inside the space, got {dict(point)}")
        design.append(space.to_unit(point))
    if n_initial_points:
        design.extend(_latin_design(dims, n_initial_points, seed))
    return np.array(design).reshape(-1, dims)


def _surrogate(space: SearchSpace, seed: int, exploration: float, candidates: int
               ) -> tuple[Any, Any]:
    """The Gaussian-process regressor and the skopt optimiser around it (unit cube)."""
    dims = len(space.dimensions)
    optimizer, regressor, constant, matern, real = _skopt()
    kernel = constant(1.0, (1e-2, 1e2)) * matern(
        length_scale=np.full(dims, 0.3), length_scale_bounds=(0.02, 5.0), nu=2.5
    )
    gp = regressor(
        kernel=kernel,
        normalize_y=True,
        noise="gaussian",
        n_restarts_optimizer=2,
        random_state=seed,
    )
    return gp, optimizer(
        # Bounds in the unit cube: skopt sees only our normalised coordinates.
        [real(0.0, 1.0, name=name) for name in space.names],
        base_estimator=gp,
        n_initial_points=0,
        acq_func="EI",
        # xi: the improvement (value's unit) a proposal must promise beyond the incumbent.
        # Under noise, plain EI keeps re-measuring next to one lucky result.
        acq_func_kwargs={"xi": exploration},
        acq_optimizer="sampling",
        acq_optimizer_kwargs={"n_points": candidates},
        random_state=seed,
    )


class BayesianSearch(SearchRecord):
    """Bayesian optimisation with a noise-aware Gaussian-process surrogate (skopt ask/tell).

    The surrogate models ``-value`` (skopt minimises) with a Matern(5/2) kernel on the unit
    cube, a learned white-noise term for scatter beyond the stated errors, and each result's
    own ``stderr**2`` as its fixed noise variance. Proposals maximise expected improvement
    over a random sample of candidates (sampling, not L-BFGS, so a step stays fast at a few
    hundred results).

    The first points asked are ``initial_points`` (in order), then ``n_initial_points``
    Latin-hypercube points (space filling, from ``seed``); the surrogate proposes after that.
    ``warm_start`` results (earlier measurements) are told to the surrogate at construction
    and count neither in :attr:`n_told` nor in the design.

    Drift compensation
    ------------------
    With ``drift_dimension`` named (e.g. ``"detuning"``) and a rig clock given with every
    result, the rig is modelled as ``true = set-point + offset(t)`` along that dimension with
    a linear drift ``offset(t) = offset0 + r t``. A result measured at clock ``t_i`` and
    set-point ``x_i`` then stands, for a query at clock ``t_now``, at the set-point
    ``x_i - r (t_now - t_i)`` (the one that now gives the same true value). The surrogate is
    fitted on the drift-free coordinate ``x_i + r t_i`` and queried at ``x + r t_now``.

    The rate ``r`` is estimated at every fit by maximising the GP log marginal likelihood over
    ``drift_grid`` rates evenly spaced in ``[-max_drift_rate, +max_drift_rate]`` (0 is always
    one of them, so a drift-free run keeps ``r = 0`` unless the data argue otherwise), then a
    bounded scalar refine around the best grid rate. The kernel hyperparameters of the
    previous fit are held fixed during that search (one Cholesky factorisation per rate);
    they are refitted afterwards on the corrected coordinates. Until 8 results (warm start
    included) carry clocks, or whenever one result lacks a clock, the search is exactly the
    stationary one (the skopt Optimizer path) and :attr:`drift_rate` is 0.

    Proposals (drift mode) maximise skopt's ``gaussian_ei`` over a scrambled Sobol sample of
    the box at ``t_now``, redrawn (from ``seed`` and the number of results) at every tell. The
    recommendation is the measured point with the best lower bound (posterior mean - std),
    each measured point taken at its shifted position at ``t_now``, clipped to the box.

    Parameters
    ----------
    space : SearchSpace
    seed : int
        Seed of the design, the surrogate fit and the acquisition sampling.
    initial_points : sequence of mappings
        Points measured first (e.g. the nominal 2 pi velocity at zero detuning).
    n_initial_points : int
        Space-filling points after ``initial_points`` (>= 0).
    warm_start : sequence of Observation or (point, value, stderr[, clock_s])
        Earlier results to learn from before the first ask.
    convergence : Convergence
        The stopping test.
    n_points : int, optional
        Budget of told results; :meth:`exhausted` is true once reached.
    candidates : int
        Size of the fixed quasi-random candidate set for the recommendation and the
        convergence test, and of the acquisition sample.
    exploration : float
        Expected-improvement margin ``xi`` (value's unit, >= 0): a proposal must promise this
        much beyond the best posterior mean at a measured point.
    drift_dimension : str, optional
        The dimension whose true value drifts linearly with the rig clock (``None``: no drift
        model, clocks ignored).
    max_drift_rate : float
        Largest drift rate considered, in the drift dimension's unit per second (> 0; the
        default 3 Hz/s is 10.8 kHz per hour for ``detuning``).
    drift_grid : int
        Number of rates on the grid of the rate search (odd, >= 3, so that 0 is on it).

    Notes
    -----
    Determinism and resuming: every random choice derives from ``seed`` and the number of
    results told, and every fit is a function of the results (points, values, stderrs and
    clocks) in their order. A search rebuilt with the same arguments and re-told the same
    results with the same clocks, in order, asks the same next point and recommends the same
    point for the same ``clock_s``.
    """

    name = "bayesian"

    def __init__(
        self,
        space: SearchSpace,
        *,
        seed: int,
        initial_points: Sequence[Mapping[str, float]] = (),
        n_initial_points: int = 8,
        warm_start: Sequence[Observation | tuple[Any, ...]] = (),
        convergence: Convergence = Convergence(),
        n_points: int | None = None,
        candidates: int = 2048,
        exploration: float = 0.01,
        drift_dimension: str | None = None,
        max_drift_rate: float = 3.0,
        drift_grid: int = 21,
    ) -> None:
        super().__init__(space)
        _check_settings(space, seed=seed, n_initial_points=n_initial_points, n_points=n_points,
                        convergence=convergence, candidates=candidates, exploration=exploration,
                        drift_dimension=drift_dimension, max_drift_rate=max_drift_rate,
                        drift_grid=drift_grid)
        self.seed = int(seed)
        self.convergence = convergence
        self.exploration = float(exploration)
        self.drift_dimension = drift_dimension
        self.max_drift_rate = float(max_drift_rate)
        self._budget = n_points
        dims = len(space.dimensions)
        self._n_candidates = candidates
        self._design = _first_design(space, initial_points, int(n_initial_points), self.seed)
        warm = [_as_observation(item) for item in warm_start]
        if not len(self._design) and not warm:
            raise ValueRefused("BayesianSearch: expected initial_points, n_initial_points > 0 or a warm_start")
        from scipy.stats import qmc  # scipy.stats loads here, not at import
        self._candidates = qmc.Sobol(d=dims, scramble=True, rng=np.random.default_rng(self.seed + 1)).random(candidates)
        self._regressor, self._optimizer = _surrogate(space, self.seed, float(exploration), candidates)
        self._all_stderrs: list[float] = []
        self._model = None
        self._history: list[tuple[np.ndarray, float | None]] = []
        self._warm_count = len(warm)
        self._start_drift_model(drift_grid)
        self._tell_warm_start(warm)

    def _start_drift_model(self, drift_grid: int) -> None:
        """The drift model's state: all results, warm start first, in order."""
        drift_dimension = self.drift_dimension
        self._axis = self.space.names.index(drift_dimension) if drift_dimension is not None else -1
        self._rate_grid = np.linspace(-1.0, 1.0, drift_grid) * self.max_drift_rate
        self._all_units: list[np.ndarray] = []
        self._all_values: list[float] = []
        self._all_clocks: list[float | None] = []
        self._drift_model = None  # the GP fitted on drift-free coordinates, when in drift mode
        self._drift_kernel = None  # its fitted kernel (without the white-noise term)
        self._drift_noise = 0.0  # its learned white-noise level (normalised units)
        self._rate_unit = 0.0  # estimated rate, unit-cube width per second
        self._proposal: dict[float | None, np.ndarray] = {}

    def _tell_warm_start(self, warm: Sequence[Observation]) -> None:
        """Tell the earlier results, fitting once after the last."""
        for k, item in enumerate(warm):
            try:
                unit = self._check_result(item.point, item.value, item.stderr)
                clock = self._check_clock(item.clock_s)
            except ValueError as exc:
                raise ValueRefused(f"warm_start[{k}]: {exc}") from exc
            self._feed(unit, float(item.value), float(item.stderr), clock, fit=(k == len(warm) - 1))

    # -- adapter ------------------------------------------------------------------------

    def _drift_ready(self) -> bool:
        return (self._axis >= 0 and len(self._all_clocks) >= _DRIFT_MIN_RESULTS
                and all(clock is not None for clock in self._all_clocks))

    def _feed(self, unit: np.ndarray, value: float, stderr: float, clock: float | None, fit: bool) -> None:
        self._all_stderrs.append(stderr)
        self._all_units.append(unit)
        self._all_values.append(value)
        self._all_clocks.append(clock)
        self._proposal.clear()
        drift = fit and self._drift_ready()
        if fit and not drift:
            scale = float(np.std(np.array(self._optimizer.yi + [-value], dtype=float)))
            # sklearn's normalize_y divides y by its std; alpha is added in those units.
            scale = scale if scale > 0.0 else 1.0
            alpha = np.array(self._all_stderrs) ** 2 / scale**2 + 1e-10
            self._optimizer.base_estimator_.set_params(alpha=alpha)
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message="The objective has been evaluated at this point before")
            self._optimizer.tell([float(u) for u in unit], -value, fit=fit and not drift)
        if drift:
            self._fit_drift()
        elif fit:
            self._drift_model = None
            self._rate_unit = 0.0
            self._model = self._optimizer.models[-1]
            if len(self._all_stderrs) >= _WARM_HYPERPARAMETERS_AFTER:
                # Start the next fit from these hyperparameters with a single L-BFGS run:
                # the fit then costs one local search, not three, at a few hundred results.
                fitted = self._model.kernel_
                signal = fitted.k1 if hasattr(fitted, "k1") and hasattr(fitted.k1, "k1") else fitted
                self._optimizer.base_estimator_.set_params(kernel=signal, n_restarts_optimizer=0)

    # -- drift model --------------------------------------------------------------------

    def _elapsed(self) -> np.ndarray:
        clocks = np.array(self._all_clocks, dtype=float)
        return clocks - clocks[0]

    def _shifted(self, units: np.ndarray, elapsed: np.ndarray, rate_unit: float) -> np.ndarray:
        """Drift-free coordinates ``u + r (t - t_first)`` along the drift axis."""
        shifted = np.array(units, dtype=float, copy=True)
        shifted[:, self._axis] += rate_unit * elapsed
        return shifted

    def _fit_drift(self) -> None:
        units = np.array(self._all_units)
        targets = -np.array(self._all_values)
        elapsed = self._elapsed()
        scale = float(np.std(targets))
        # sklearn's normalize_y divides y by its std; alpha is added in those units.
        scale = scale if scale > 0.0 else 1.0
        alpha = np.array(self._all_stderrs) ** 2 / scale**2 + 1e-10
        normalised = (targets - np.mean(targets)) / scale
        width = float(self.space.dimensions[self._axis].width)
        if self._drift_kernel is None:
            # First drift fit: hyperparameters from the stationary model (rate 0).
            self._fit_gp(units, targets, alpha, warm=False)
        rates = self._rate_grid / width
        scores = np.array([self._log_likelihood(units, elapsed, rate, normalised, alpha) for rate in rates])
        best = int(np.argmax(scores))
        rate = float(rates[best])
        step = float(rates[1] - rates[0])
        from scipy import optimize  # scipy.optimize loads here, not at import
        refined = optimize.minimize_scalar(
            lambda r: -self._log_likelihood(units, elapsed, r, normalised, alpha),
            bounds=(max(rates[0], rate - step), min(rates[-1], rate + step)), method="bounded",
            options={"xatol": 1e-3 * step},
        )
        # The refine may only improve on the grid: a flat likelihood keeps the grid's rate (0).
        if refined.success and -refined.fun > scores[best] + 1e-9:
            rate = float(refined.x)
        self._rate_unit = rate
        self._fit_gp(self._shifted(units, elapsed, rate), targets, alpha,
                     warm=len(self._all_values) >= _WARM_HYPERPARAMETERS_AFTER)

    def _fit_gp(self, coordinates: np.ndarray, targets: np.ndarray, alpha: np.ndarray, warm: bool) -> None:
        # Imported here, as _skopt() is: only the Gaussian-process strategies need scikit-learn,
        # and every stage's process would otherwise pay for its import.
        from sklearn.base import clone
        from sklearn.exceptions import ConvergenceWarning

        model = clone(self._regressor).set_params(alpha=alpha)
        if warm and self._drift_kernel is not None:
            model.set_params(kernel=self._drift_kernel, n_restarts_optimizer=0)
        with warnings.catch_warnings():
            # Hyperparameters at their bounds are expected (a flat axis, a noise-free run).
            warnings.simplefilter("ignore", ConvergenceWarning)
            model.fit(coordinates, targets)
        self._drift_model = model
        self._model = model
        fitted = model.kernel_
        self._drift_kernel = fitted.k1 if hasattr(fitted, "k1") and hasattr(fitted.k1, "k1") else fitted
        self._drift_noise = float(model.noise_ or 0.0)

    def _log_likelihood(self, units: np.ndarray, elapsed: np.ndarray, rate_unit: float,
                        normalised: np.ndarray, alpha: np.ndarray) -> float:
        """GP log marginal likelihood of the normalised targets at a drift rate (kernel held fixed)."""
        coordinates = self._shifted(units, elapsed, rate_unit)
        covariance = self._drift_kernel(coordinates)
        covariance[np.diag_indices_from(covariance)] += alpha + self._drift_noise
        from scipy import linalg  # scipy.linalg loads here, not at import
        try:
            factor = linalg.cholesky(covariance, lower=True)
        except linalg.LinAlgError:
            return -math.inf
        weights = linalg.cho_solve((factor, True), normalised)
        return float(-0.5 * normalised @ weights - np.sum(np.log(np.diag(factor)))
                     - 0.5 * len(normalised) * math.log(2 * math.pi))

    @property
    def drift_rate(self) -> float:
        """Estimated drift rate of ``drift_dimension`` (its unit per second; 0 until estimated).

        Sign convention: ``true = set-point + offset0 + drift_rate * t``.
        """
        if self._drift_model is None:
            return 0.0
        return float(self._rate_unit * self.space.dimensions[self._axis].width)

    def _now(self, clock_s: float | None) -> float | None:
        """The query clock: ``clock_s``, else the last result's clock."""
        clock = self._check_clock(clock_s)
        if self._drift_model is None:
            return None
        return clock if clock is not None else self._all_clocks[-1]

    def _query(self, units: np.ndarray, now: float | None) -> np.ndarray:
        """Model coordinates of set-points (unit cube) queried at clock ``now``."""
        if self._drift_model is None or now is None:
            return units
        elapsed = np.full(len(units), now - self._all_clocks[0])
        return self._shifted(units, elapsed, self._rate_unit)

    def _measured_now(self, now: float | None) -> np.ndarray:
        """Measured set-points moved to where they stand at clock ``now``, clipped to the box."""
        if self._drift_model is None or now is None:
            return np.array(self._optimizer.Xi, dtype=float)
        units = np.array(self._all_units)
        elapsed = now - np.array(self._all_clocks, dtype=float)
        moved = self._shifted(units, -elapsed, self._rate_unit)
        return np.clip(moved, 0.0, 1.0)

    # -- interface ----------------------------------------------------------------------

    def _in_design(self) -> bool:
        return self.n_told < len(self._design)

    def _predict(self, units: np.ndarray, now: float | None = None) -> tuple[np.ndarray, np.ndarray]:
        mean, std = self._model.predict(self._query(units, now), return_std=True)
        return -np.asarray(mean, dtype=float), np.asarray(std, dtype=float)

    def ask(self, *, clock_s: float | None = None) -> dict[str, float]:
        """The next design point, then the surrogate's expected-improvement proposal.

        ``clock_s`` (s) is the rig clock at which the point will be measured (default: the last
        result's clock); used only in drift mode.
        """
        now = self._now(clock_s)
        if self._in_design():
            return self.space.from_unit(self._design[self.n_told])
        if self._drift_model is None:
            with warnings.catch_warnings():
                # Re-measuring a point is legitimate under noise.
                warnings.filterwarnings("ignore", message="The objective has been evaluated at this point before")
                unit = self._optimizer.ask()
            return self.space.from_unit(unit)
        if now not in self._proposal:
            self._proposal[now] = self._propose(now)
        return self.space.from_unit(self._proposal[now])

    def _propose(self, now: float) -> np.ndarray:
        dims = len(self.space.dimensions)
        rng = np.random.default_rng([self.seed, 2, len(self._all_values)])
        from scipy.stats import qmc  # scipy.stats loads here, not at import
        candidates = qmc.Sobol(d=dims, scramble=True, rng=rng).random(self._n_candidates)
        incumbent = float(np.min(self._model.predict(self._query(self._measured_now(now), now))))
        improvement = _gaussian_ei()(self._query(candidates, now), self._model, y_opt=incumbent, xi=self.exploration)
        return candidates[int(np.argmax(improvement))]

    def tell(self, point: Mapping[str, float], value: float, stderr: float, *,
             clock_s: float | None = None) -> None:
        """Record a result (value maximised); refits the surrogate once the design is done.

        ``clock_s`` (s) is the rig clock at the middle of the measurement; used in drift mode.
        """
        unit = self._check_result(point, value, stderr)
        clock = self._check_clock(clock_s)
        self._store(unit, value, stderr)
        self._feed(unit, float(value), float(stderr), clock, fit=not self._in_design())
        if self._model is not None:
            now = self._now(None)
            self._history.append((self._recommend_unit(now)[0], now))

    def _recommend_unit(self, now: float | None) -> tuple[np.ndarray, float, float]:
        # Only measured points are eligible: where the landscape is flat (the velocity axis near
        # the 2*pi point) the argmax of the mean over the whole box drifts to an edge the
        # surrogate extrapolates to, and a noisy edge is the worst place to leave a rig.
        # Among them, the best lower bound (mean - std) prefers a well-surrounded point to an
        # isolated lucky one.
        # When the best of them sits at an edge of the box and an interior point is tied with
        # it (its mean reaches the best lower bound), the interior point is chosen: on a flat
        # axis the surrogate cannot tell them apart, and the edge is where it extrapolates.
        evaluated = self._measured_now(now)
        mean, std = self._predict(evaluated, now)
        lower = mean - std
        best = int(np.argmax(lower))
        margin = np.min(np.minimum(evaluated, 1.0 - evaluated), axis=1)
        interior = (margin >= _EDGE_MARGIN) & (mean >= lower[best])
        if margin[best] < _EDGE_MARGIN and np.any(interior):
            best = int(np.flatnonzero(interior)[np.argmax(lower[interior])])
        return evaluated[best], float(mean[best]), float(std[best])

    def recommend(self, *, clock_s: float | None = None) -> Recommendation:
        """The evaluated point with the best surrogate lower bound (posterior mean - std).

        In drift mode each evaluated point is taken where it stands at ``clock_s`` (default:
        the last result's clock). Before the surrogate is fitted (during the initial design)
        the best observed result.
        """
        now = self._now(clock_s)
        if self._model is None:
            return self._best_observed()
        unit, value, stderr = self._recommend_unit(now)
        return Recommendation(self.space.from_unit(unit), value, stderr)

    def expected_improvement(self, *, clock_s: float | None = None) -> float:
        """Largest expected improvement over the candidate set (value's unit; inf before a fit).

        The incumbent is the best posterior mean at an evaluated point, not the best noisy
        observation.
        """
        now = self._now(clock_s)
        if self._model is None:
            return math.inf
        incumbent = float(np.max(self._predict(self._measured_now(now), now)[0]))
        mean, std = self._predict(self._candidates, now)
        std = np.maximum(std, 1e-12)
        z = (mean - incumbent) / std
        improvement = (mean - incumbent) * special.ndtr(z) + std * np.exp(-0.5 * z**2) / math.sqrt(2 * math.pi)
        return float(np.max(improvement))

    def exhausted(self) -> bool:
        """True once ``n_points`` results have been told (never without a budget)."""
        return self._budget is not None and self.n_told >= self._budget

    def converged(self, *, clock_s: float | None = None) -> bool:
        """The :class:`Convergence` test on the surrogate (at ``clock_s`` in drift mode).

        In drift mode the recommendations of the last tells are moved to ``clock_s`` with the
        present rate before their distances are compared.
        """
        now = self._now(clock_s)
        rule = self.convergence
        if self._model is None or self.n_told - len(self._design) < rule.min_told:
            return False
        if len(self._history) < rule.stable_tells:
            return False
        recent = []
        for unit, then in self._history[-rule.stable_tells:]:
            moved = np.array(unit, dtype=float, copy=True)
            if now is not None and then is not None:
                moved[self._axis] -= self._rate_unit * (now - then)
            recent.append(moved)
        recent = np.array(recent)
        if np.max(np.linalg.norm(recent - recent[-1], axis=1)) > rule.stable_distance:
            return False
        if self.expected_improvement(clock_s=clock_s) >= rule.expected_improvement:
            return False
        return self.upper_bound_gap(clock_s=clock_s) < rule.upper_bound_gap

    def upper_bound_gap(self, *, clock_s: float | None = None) -> float:
        """Largest ``mean + k std`` over candidates minus the recommended mean (inf before a fit).

        ``k`` is ``convergence.upper_bound_sigmas``; value's unit.
        """
        now = self._now(clock_s)
        if self._model is None:
            return math.inf
        _, value, _ = self._recommend_unit(now)
        mean, std = self._predict(self._candidates, now)
        return float(np.max(mean + self.convergence.upper_bound_sigmas * std) - value)
