"""One stage with an ask/tell strategy (:func:`run_stage`): a retune's check, the search within
its budget, an optional detuning scan through the recommendation, the verification; and
what a stage ends with (:class:`StageOutcome`), the strategy built from the config.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from autotune.config import RunConfig
from autotune.errors import ConfigError
from autotune.analysis.fringe import InversionEstimate
from autotune.wire.rig import measurement_shots
from autotune.analysis.search import Dimension, SearchSpace, Strategy
from autotune.analysis.shortfall import finite_or_none
from autotune.analysis.strategies import make_strategy
from autotune.run.guard import Budget
from autotune.run.session import Measurement, Session
from autotune.run.replay import measured_estimates, replay_records, tally_from

__all__ = ["StageOutcome", "StageRun", "quadratic_peak", "child_seed", "search_space",
           "build_strategy", "run_stage", "verification_shots"]


@dataclass(frozen=True)
class StageOutcome:
    """What one stage (a calibration or a retune) ended with."""

    status: str
    setpoints: dict[str, float]
    estimate: InversionEstimate
    stop_reason: str
    points: int
    shots: int
    rig_time_s: float
    accepted: bool
    check: InversionEstimate | None = None
    drift_rate_hz_per_s: float = 0.0
    lock_prior: dict[str, Any] | None = None
    predicted_shortfall: dict[str, Any] | None = None
    reason: str = ""


def quadratic_peak(x: Sequence[float], y: Sequence[float], stderr: Sequence[float]) -> float:
    """The ``x`` of the peak of a weighted quadratic fit of ``y(x)``, within the scanned range.

    Weights are ``1 / stderr**2``. If the fitted parabola does not open downwards, or its
    vertex lies outside ``[min(x), max(x)]``, the ``x`` of the best ``y`` is returned instead.
    """
    xs = np.asarray(x, dtype=float)
    ys = np.asarray(y, dtype=float)
    weights = 1.0 / np.maximum(np.asarray(stderr, dtype=float), 1e-12)
    best = float(xs[int(np.argmax(ys))])
    if len(np.unique(xs)) < 3:
        return best
    centre, scale = float(np.mean(xs)), float(np.ptp(xs)) or 1.0
    # np.polyfit weights multiply residuals, so they are 1/sigma (not 1/sigma^2).
    curvature, slope, _ = np.polyfit((xs - centre) / scale, ys, 2, w=weights)
    if curvature >= 0.0:
        return best
    vertex = centre - scale * slope / (2.0 * curvature)
    return float(vertex) if xs.min() <= vertex <= xs.max() else best


def child_seed(seed: int, *path: int) -> int:
    """A reproducible 32-bit child seed of ``seed`` for the sub-task named by ``path``."""
    return int(np.random.SeedSequence([seed, *path]).generate_state(1)[0])


def verification_shots(config: RunConfig, shots_per_phase: int | None) -> int:
    """Shots per field and phase of a stage's verification: ``shots_per_phase`` if given (a
    retune's or a night's), else ``[measurement] verification_shots_per_phase``."""
    return shots_per_phase or config.measurement.verification_shots_per_phase


def search_space(box: Mapping[str, tuple[float, float]]) -> SearchSpace:
    """The search space over ``{name: (low, high)}``, in the given order."""
    return SearchSpace(tuple(Dimension(name, lo, hi) for name, (lo, hi) in box.items()))


def build_strategy(kind: str, space: SearchSpace, config: RunConfig, *, seed: int,
                   n_initial_points: int, max_points: int,
                   initial_points: Sequence[Mapping[str, float]] = (),
                   warm_start: Sequence[tuple[Mapping[str, float], float, float, float]] = ()
                   ) -> Strategy:
    """The configured strategy over ``space``, with the settings of ``config.search``."""
    search = config.search
    if kind == "bayesian":
        drift = "detuning" if search.drift_compensation and "detuning" in space.names else None
        return make_strategy("bayesian", space, seed=seed, initial_points=initial_points,
                             n_initial_points=n_initial_points, warm_start=warm_start,
                             exploration=search.exploration, drift_dimension=drift,
                             max_drift_rate=search.max_drift_hz_per_s)
    if kind == "grid":
        return make_strategy("grid", space, seed=seed,
                             points_per_dimension=search.grid_points_per_dimension)
    if kind == "coordinate":
        start = dict(initial_points[0]) if initial_points else None
        return make_strategy("coordinate", space, seed=seed,
                             points_per_dimension=search.coordinate_points_per_dimension,
                             rounds=search.coordinate_rounds, start=start)
    if kind == "random":
        return make_strategy("random", space, seed=seed, n_points=max_points)
    raise ConfigError(config.source, "search.strategy", "bayesian, grid, coordinate or random", kind)


def _refine_detuning(session: Session, chosen: Mapping[str, float],
                     box: Mapping[str, tuple[float, float]],
                     measurement: Callable[..., Measurement],
                     estimate_of: Callable[[str, int], InversionEstimate | None],
                     seed_of: Callable[[int], int],
                     planned: Sequence[float] | None) -> dict[str, float]:
    """Measure a detuning scan through ``chosen`` and return ``chosen`` moved to its peak.

    The scan's detunings are journaled (a ``refine_plan`` decision) before the first of them
    is measured; a resume passes them back as ``planned`` and finishes the same scan.
    """
    search = session.config.search
    if planned is None:
        low, high = box["detuning"]
        centre = min(max(chosen["detuning"], low + search.refine_half_width_hz),
                     high - search.refine_half_width_hz)
        offsets = np.linspace(-search.refine_half_width_hz, search.refine_half_width_hz,
                              search.refine_points)
        planned = [float(min(max(centre + offset, low), high)) for offset in offsets]
        session.decide("refine_plan", f"detuning scan of {len(planned)} points from "
                       f"{planned[0] / 1e3:+.2f} to {planned[-1] / 1e3:+.2f} kHz",
                       detunings=planned, setpoints=dict(chosen))
    xs, ys, es = [], [], []
    for k, detuning in enumerate(planned):
        target = {**chosen, "detuning": float(detuning)}
        m = measurement("refine", k, target, session.config.measurement.shots_per_phase)
        estimate = estimate_of("refine", k) or session.measure(m, seed_of(k))
        xs.append(m.setpoints["detuning"])
        ys.append(estimate.inversion)
        es.append(estimate.inversion_stderr)
    peak = quadratic_peak(xs, ys, es)
    session.decide("refine", f"detuning scan of {len(xs)} points through the recommendation: "
                   f"peak at {peak / 1e3:+.2f} kHz (was {chosen['detuning'] / 1e3:+.2f} kHz)",
                   detunings=xs, inversions=ys)
    return {**chosen, "detuning": peak}


def run_stage(session: Session, *, stage: str, box: Mapping[str, tuple[float, float]],
              budget: Budget, n_initial_points: int,
              initial_points: Sequence[Mapping[str, float]] = (),
              check_at: Mapping[str, float] | None = None,
              still_good_above: float | None = None,
              verification_shots_per_phase: int | None = None,
              observer: Callable[[int, Strategy, Session], None] | None = None,
              refine: bool = False,
              records: Sequence[Mapping[str, Any]] = ()) -> StageOutcome:
    """Run (or resume) one stage: optional check, search, verification at the recommendation.

    Parameters
    ----------
    session : Session
        The guarded conversation with the rig.
    stage : str
        ``"calibrate"`` or ``"retune"`` (recorded, and part of the child seeds).
    box : Mapping[str, (float, float)]
        The search box, in set-point units.
    budget : Budget
        Hard limits on points, shots and rig time of the search.
    n_initial_points : int
        Size of the strategy's first design.
    initial_points : sequence of set-point dicts
        Points the first design must include (the nominal 2*pi point, the last good one).
    check_at : Mapping, optional
        Measure here first (retune). If the measured inversion reaches
        ``still_good_above``, stop with status ``"still_good"`` without searching.
    still_good_above : float, optional
        Threshold of the check (inversion units).
    verification_shots_per_phase : int, optional
        Shots per field and phase of the check and the verification (default: the
        configured ``measurement.verification_shots_per_phase``).
    observer : callable, optional
        Called as ``observer(points_told, strategy, session)`` after every told point
        (benchmark studies follow the recommendation with it; it must not touch the rig's
        set-points).
    refine : bool
        After the search, re-measure a short detuning scan through the recommendation
        (``search.refine_points`` points over +- ``search.refine_half_width_hz``) and move the
        choice to the peak of a quadratic fit of it: fresh data at one moment, so the choice
        does not lag behind a cavity drift during a long search.
    records : sequence of journal records
        Records of an earlier, killed attempt of this same stage, to resume from.

    Notes
    -----
    Resuming: the stage record fixes the box and the first design; finished points (their
    estimates) are told to the strategy once each, in their original order; a proposal or
    measurement already journaled is measured as journaled (only its missing acquisitions,
    resending any request whose reply never arrived with its own ``msg_id``); a measurement
    not started yet takes the shots per phase of the present configuration (an ``amend``
    record says so); a recommendation, detuning-scan plan or stop decision already journaled
    is kept. Budgets are those of the present configuration.
    """
    run = _AskTellStage(session, stage, records)
    box, initial_points = run.begin(box, initial_points, budget)
    long_shots = verification_shots(run.config, verification_shots_per_phase)
    run.plan(budget, long_shots, refine_points=run.config.search.refine_points
             if refine and "detuning" in box else 0)
    warm_start: list[tuple[Mapping[str, float], float, float, float | None]] = []
    check_estimate: InversionEstimate | None = None
    if check_at is not None:
        check_estimate, passed = run.check(check_at, still_good_above, long_shots, warm_start)
        if passed is not None:
            return passed
    strategy = build_strategy(run.config.search.strategy, search_space(box), run.config,
                              seed=run.seed_for("strategy"),
                              n_initial_points=n_initial_points, max_points=budget.max_points,
                              initial_points=initial_points, warm_start=warm_start)
    stop_reason, n_points = run.search(strategy, budget, observer)
    chosen, drift_rate = run.choose(strategy, box, refine)
    return run.verify(chosen, long_shots, stop_reason, n_points, check_estimate, drift_rate)


class StageRun:
    """Where a stage's run starts (:func:`run_stage`, :func:`autotune.run.guided_stage.run_guided_stage`):
    the session, its configuration and seed, the stage's code in the child seeds, and the
    records of an earlier attempt replayed (the session's tally taken from them).

    Parameters
    ----------
    session : Session
        The guarded conversation with the rig.
    stage : {"calibrate", "retune"}
    records : sequence of journal records
        Records of an earlier attempt of this stage (empty for a new run).
    """

    #: The child seed's code of each kind of draw of a stage, after the stage's own code (so
    #: that a resume draws the same numbers): the strategy's; an ask/tell stage's measurements
    #: by their label; a phase-lock step; a phase-lock verification pooled from its halves.
    SEED_CODES: ClassVar[Mapping[str, int]] = {
        "strategy": 0, "check": 1, "point": 2, "verify": 3, "refine": 4,
        "phase_lock_step": 5, "pooled_verification": 6}

    def __init__(self, session: Session, stage: str, records: Sequence[Mapping[str, Any]]):
        self.session = session
        self.config = session.config
        self.seed = self.config.search.seed
        self.stage = stage
        self.stage_code = {"calibrate": 1, "retune": 2}[stage]
        self.records = records
        self.replayed = replay_records(records)
        self.measurements = self.replayed.measurements
        session.tally = tally_from(records)

    def seed_for(self, kind: str, *path: int) -> int:
        """The child seed of one of the stage's draws (``kind`` one of :attr:`SEED_CODES`,
        ``path`` the step's numbers)."""
        return child_seed(self.seed, self.stage_code, self.SEED_CODES[kind], *path)

    @property
    def resend_ids(self) -> list[str]:
        """The ``msg_id`` of every journaled request whose reply never arrived: a resume asks
        the rig for them again first."""
        return [msg_id for m in self.measurements.values() for msg_id, _ in m.pending.values()]

    def measurement(self, label: str, point: int, setpoints: Mapping[str, float],
                    shots_per_phase: int) -> Measurement:
        """The measurement ``(label, point)``: the journaled one, else a new one journaled."""
        key = (label, point)
        if key not in self.measurements:
            self.measurements[key] = Measurement(label, point, dict(setpoints), shots_per_phase)
            self.session.journal.append("measurement", label=label, point=point,
                                        setpoints=dict(setpoints),
                                        shots_per_phase=shots_per_phase)
        return self.measurements[key]


class _AskTellStage(StageRun):
    """One ask/tell stage as it runs: what its journal already holds (a resume) and the steps
    of :func:`run_stage`, each journaled before it is measured."""

    def __init__(self, session: Session, stage: str, records: Sequence[Mapping[str, Any]]):
        super().__init__(session, stage, records)
        self.told = sorted((key for key in self.replayed.estimate_order if key[0] == "point"),
                           key=lambda k: k[1])
        self.shots = self.config.measurement.shots_per_phase

    def begin(self, box: Mapping[str, tuple[float, float]],
              initial_points: Sequence[Mapping[str, float]], budget: Budget
              ) -> tuple[Mapping[str, tuple[float, float]], Sequence[Mapping[str, float]]]:
        """Journal the stage (or, resuming, say what is taken up again); the box and first
        design in force (a resume keeps the journaled ones)."""
        session, replayed = self.session, self.replayed
        if not replayed.header:
            session.journal.append("stage", stage=self.stage,
                                   box={k: list(v) for k, v in box.items()},
                                   initial_points=[dict(p) for p in initial_points],
                                   budget=budget.__dict__, strategy=self.config.search.strategy,
                                   seed=self.seed)
            return box, initial_points
        header = replayed.header
        box = {k: (float(v[0]), float(v[1])) for k, v in header["box"].items()}
        initial_points = [dict(p) for p in header["initial_points"]]
        resend = self.resend_ids
        session.decide("resume", f"continuing {self.stage} from {len(self.records)} journal "
                       f"records: {len(replayed.estimates)} finished measurements "
                       f"({len(self.told)} search points told to the strategy again, once "
                       f"each), {len(resend)} requests to ask the rig for again by their msg_id",
                       estimates=len(replayed.estimates), retold=[k[1] for k in self.told],
                       resend=resend)
        return box, initial_points

    def plan(self, budget: Budget, long_shots: int, refine_points: int) -> None:
        """Tell the progress observer the plan; give a journaled measurement not started yet
        the shots per phase of the present configuration (an ``amend`` record)."""
        session, shots = self.session, self.shots
        per_measurement = measurement_shots(len(session.phases), 1)
        session.plan_progress(self.stage, budget, step_shots=per_measurement * shots,
                              verify_shots=per_measurement * long_shots,
                              refine_points=refine_points,
                              measured=measured_estimates(self.replayed))
        wanted_shots = {"check": long_shots, "verify": long_shots}
        for key, m in self.measurements.items():
            want = wanted_shots.get(m.label, shots)
            if key not in self.replayed.estimates and not m.started and m.shots_per_phase != want:
                session.journal.append("amend", label=m.label, point=m.point,
                                       shots_per_phase=want,
                                       reason=f"not started yet: shots per phase "
                                              f"{m.shots_per_phase} of the journal replaced by "
                                              f"{want} of the present configuration")
                m.shots_per_phase = want

    def estimate_of(self, label: str, point: int) -> InversionEstimate | None:
        """The journaled estimate of ``(label, point)``, if it was finished."""
        rec = self.replayed.estimates.get((label, point))
        return None if rec is None else InversionEstimate.from_dict(rec["estimate"])

    def check(self, check_at: Mapping[str, float], still_good_above: float | None,
              long_shots: int, warm_start: list[tuple[Mapping[str, float], float, float,
                                                       float | None]]
              ) -> tuple[InversionEstimate, StageOutcome | None]:
        """A retune's check at ``check_at`` (added to ``warm_start``); the outcome
        ``still_good`` when it reaches ``still_good_above``, else None (the search follows)."""
        session = self.session
        check_estimate = self.estimate_of("check", 0)
        if check_estimate is None:
            m = self.measurement("check", 0, check_at, long_shots)
            check_estimate = session.measure(m, self.seed_for("check"))
        check = self.measurements.get(("check", 0))
        check_setpoints = dict(check.setpoints) if check is not None else dict(check_at)
        check_clock = check.clock_s if check is not None else None
        warm_start.append((check_setpoints, check_estimate.inversion,
                           check_estimate.inversion_stderr, check_clock))
        if still_good_above is not None and check_estimate.inversion >= still_good_above:
            session.decide("still_good", f"inversion {check_estimate.inversion:.3f} (upper "
                           f"{check_estimate.inversion_high:.3f}) reaches {still_good_above:.3f}",
                           setpoints=check_setpoints)
            self.session.ensure_at(check_setpoints, "leave the rig at the checked set-points")
            return check_estimate, StageOutcome(
                "still_good", check_setpoints, check_estimate, "check passed", 0,
                session.tally.shots, session.tally.rig_time_s, True, check_estimate)
        if "search" not in self.replayed.decisions:
            session.decide("search", f"inversion {check_estimate.inversion:.3f} (upper "
                           f"{check_estimate.inversion_high:.3f}) below {still_good_above:.3f}")
        return check_estimate, None

    def search(self, strategy: Strategy, budget: Budget,
               observer: Callable[[int, Strategy, Session], None] | None) -> tuple[str, int]:
        """Tell the finished points again, then ask, measure and tell until a budget is spent
        or the strategy stops; the stop's reason and the points told."""
        session, replayed = self.session, self.replayed
        for key in self.told:
            rec = replayed.estimates[key]
            est = rec["estimate"]
            strategy.tell(rec["setpoints"], float(est["inversion"]),
                          float(est["inversion_stderr"]), clock_s=rec.get("clock_s"))
        n_points = len(self.told)
        stopped = replayed.decisions.get("stop_search")
        stop_reason = str(stopped["reason"]) if stopped is not None else ""
        while not stop_reason:
            pending = self.measurements.get(("point", n_points))
            if pending is None:
                proposal = replayed.proposals.get(n_points)
                if proposal is None:
                    stop_reason = self.budget_spent(strategy, budget, n_points)
                    if stop_reason:
                        break
                    proposal = {k: float(v)
                                for k, v in strategy.ask(clock_s=session.clock).items()}
                    session.journal.append("proposal", point=n_points, setpoints=proposal,
                                           strategy=strategy.name)
                pending = self.measurement("point", n_points, proposal, self.shots)
            estimate = session.measure(pending, self.seed_for("point", n_points))
            strategy.tell(pending.setpoints, estimate.inversion, estimate.inversion_stderr,
                          clock_s=pending.clock_s)
            n_points += 1
            if observer is not None:
                observer(n_points, strategy, session)
            if n_points >= budget.min_points and strategy.converged(clock_s=session.clock):
                stop_reason = "the strategy's convergence test passed"
        if stopped is None:
            session.decide("stop_search", stop_reason, points=n_points)
        return stop_reason, n_points

    def budget_spent(self, strategy: Strategy, budget: Budget, n_points: int) -> str:
        """Why no further point is asked (a budget or the design is spent), else ``""``."""
        session = self.session
        per_point = measurement_shots(len(session.phases), self.shots)
        if n_points >= budget.max_points:
            return f"point budget of {budget.max_points} reached"
        if session.tally.shots + per_point > budget.max_shots:
            return f"shot budget {budget.max_shots} would be exceeded by the next point"
        if session.tally.rig_time_s + per_point / session.repetition_rate_hz > \
                budget.max_rig_time_s:
            return f"rig-time budget {budget.max_rig_time_s:g} s would be exceeded"
        if strategy.exhausted():
            return "the strategy's design is finished"
        return ""

    def choose(self, strategy: Strategy, box: Mapping[str, tuple[float, float]], refine: bool
               ) -> tuple[dict[str, float], float]:
        """The set-points to verify (the recommendation, moved to a detuning scan's peak with
        ``refine``) and the drift rate in Hz/s; journaled choices are kept."""
        session, replayed = self.session, self.replayed
        recommended = replayed.decisions.get("recommend")
        drift_rate = float(getattr(strategy, "drift_rate", 0.0))
        if recommended is not None:
            chosen = {k: float(v) for k, v in recommended["setpoints"].items()}
            drift_rate = float(recommended.get("drift_rate_hz_per_s", drift_rate))
        else:
            recommendation = strategy.recommend(clock_s=session.clock)
            chosen = {k: float(v) for k, v in recommendation.point.items()}
            session.decide("recommend", "surrogate's best"
                           if self.config.search.strategy == "bayesian" else "best observed",
                           setpoints=chosen, predicted=finite_or_none(recommendation.value),
                           drift_rate_hz_per_s=drift_rate)
        if refine and self.config.search.refine_points and "detuning" in box and \
                self.measurements.get(("verify", 0)) is None:
            plan = replayed.decisions.get("refine_plan")
            chosen = _refine_detuning(
                session, chosen, box, self.measurement, self.estimate_of,
                lambda k: self.seed_for("refine", k),
                None if plan is None else [float(x) for x in plan["detunings"]])
        existing = self.measurements.get(("verify", 0))
        if existing is not None:
            chosen = dict(existing.setpoints)
        return chosen, drift_rate

    def verify(self, chosen: dict[str, float], long_shots: int, stop_reason: str, n_points: int,
               check_estimate: InversionEstimate | None, drift_rate: float) -> StageOutcome:
        """Measure the verification at ``chosen`` and judge it against ``[acceptance]``."""
        session, config = self.session, self.config
        verify = self.measurement("verify", 0, chosen, long_shots)
        final = self.estimate_of("verify", 0)
        if final is None:
            final = session.measure(verify, self.seed_for("verify"))
        else:
            self.session.ensure_at(chosen, "leave the rig at the verified set-points")
        accepted = final.inversion >= config.min_inversion
        status = "accepted" if accepted else "below_acceptance"
        reason = (f"verified inversion {final.inversion:.3f} vs acceptance "
                  f"{config.min_inversion:.3f}" if accepted else
                  f"not accepted: the verified inversion {final.inversion:.3f} is below "
                  f"[acceptance] min_inversion {config.min_inversion:.3f}; check the rig "
                  f"(source, detectors), the box and [nominal] coupling_hz and waist_m and "
                  f"their units (Hz, m)")
        session.decide(status, reason, setpoints=chosen)
        return StageOutcome(status, chosen, final, stop_reason, n_points, session.tally.shots,
                            session.tally.rig_time_s, accepted, check_estimate, drift_rate,
                            reason=reason)
