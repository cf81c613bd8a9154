"""The verification of a guided stage: its two halves pooled, whether the first half already
settles it, the acceptance bar, whether the search should go on after it, and the one line
and numbers of a predicted shortfall and of an acceptance.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

from autotune.config import RunConfig
from autotune.analysis.fringe import FringeData, InversionEstimate, estimate_inversion
from autotune.wire.rig import FIELDS, measurement_shots
from autotune.analysis.guided import PhaseLockSearch, Shortfall
from autotune.run.guard import Budget
from autotune.run.session import Measurement, Session

__all__ = ["pooled_estimate", "first_half_settles", "acceptance_bar", "search_again", "bound_text",
           "shortfall_numbers", "acceptance_reason"]


def pooled_estimate(session: Session, first: Measurement, second: Measurement,
                     seed: int) -> InversionEstimate:
    """One estimate from two measurements at the same set-points (their counts summed)."""
    fringes = []
    for field_state in FIELDS:
        a, b = session.fringe(first, field_state), session.fringe(second, field_state)
        fringes.append(FringeData.from_counts(a.ramsey_phase, a.e + b.e, a.g + b.g, a.i + b.i))
    cfg = session.config.measurement
    return estimate_inversion(*fringes, confidence=cfg.confidence, seed=seed,
                              resamples=cfg.resamples)


def first_half_settles(lock: PhaseLockSearch, config: RunConfig,
                        final: tuple[dict[str, float], InversionEstimate]) -> str | None:
    """Why the verification's first half already settles the stage, or None.

    The verification is measured in two halves; the second is skipped when the first, with
    every result told, settles the verdict either way:

    - accepted: no acceptance problem (the bound within the bar, the lock, the velocity model,
      the box) and the first half's own inversion clears ``[acceptance] min_inversion`` by
      ``z`` standard errors (``z`` at the two-sided level of the lock's confidence: one of two
      looks at the same point, Bonferroni);
    - not accepted whatever the second half says: a problem that more shots at this point
      cannot mend (no lock, no velocity model, an optimum beyond the box), or an inversion
      ``z`` standard errors below ``min_inversion``.

    Only the fresh shots at the chosen set-points count for the inversion: the earlier points
    near it chose it (the recommendation is the maximum of a curve fitted to them), so their
    inversions are biased upward there. The bound is the posterior of every result, which the
    order and the choice of the points do not bias under the model (each choice depends only
    on data already seen).
    """
    chosen, estimate = final
    from scipy import stats  # scipy.stats loads here, not at import
    z = float(stats.norm.ppf(1.0 - 0.5 * (1.0 - lock.settings.confidence)))
    low = estimate.inversion - z * estimate.inversion_stderr
    high = estimate.inversion + z * estimate.inversion_stderr
    head = "the verification's first half settles it"
    bar = acceptance_bar(config)
    # A bar of 100 % vouches for nothing: the stage then checks the verified inversion only.
    structural = lock.acceptance_problems(chosen, clock_s=None, max_shortfall=math.inf) \
        if bar < 1.0 else []
    if structural:
        return f"{head}: not accepted whatever its second half says ({structural[0][0]})"
    if high < config.min_inversion:
        return (f"{head}: not accepted whatever its second half says (inversion "
                f"{estimate.inversion:.3f}, plus {z:.2f} standard errors {high:.3f}, below "
                f"[acceptance] min_inversion {config.min_inversion:.3f})")
    bound = lock.shortfall(clock_s=None, point=chosen)
    if (bar < 1.0 and not bound.upper <= bar) or low < config.min_inversion:
        return None
    return (f"{head}: inversion {estimate.inversion:.3f} (minus {z:.2f} standard errors "
            f"{low:.3f}, at least [acceptance] min_inversion {config.min_inversion:.3f}); "
            f"{bound_text(bound)} within {bar:.1%}")


def acceptance_bar(config: RunConfig) -> float:
    """The bound a stage's verified choice must meet: ``[acceptance] max_shortfall``, else
    ``[lock] still_good_shortfall`` (the goal itself, 2 %: >= 0.98 of the best)."""
    return config.max_shortfall if config.max_shortfall is not None else config.lock.still_good_shortfall


def search_again(lock: PhaseLockSearch, config: RunConfig, budget: Budget, session: Session,
                  final: tuple[dict[str, float], InversionEstimate], searched: int,
                  phases: int) -> str | None:
    """Why the search should go on after its verification, or None (the stage ends).

    It goes on when the verified choice's bound (every result told) misses the acceptance bar
    while more points could lower it: the lock and the velocity model were established, the
    velocity optimum is not beyond the box, and the point, shot and rig-time budgets leave
    room for another step. When the lock has converged elsewhere (the verification, told,
    moved its recommendation), it goes on to verify that recommendation, at most ``[lock]
    max_corrections`` times after a search step (:meth:`PhaseLockSearch.moved_recommendation`).
    Otherwise the stage is judged as it stands (also when the verified inversion is below
    ``[acceptance] min_inversion``: that says the rig, not the search).
    """
    chosen, estimate = final
    bar = acceptance_bar(config)
    if bar >= 1.0 or estimate.inversion < config.min_inversion:
        return None
    short = lock.shortfall(clock_s=None, point=chosen)
    if short.upper <= bar:
        return None
    # Only a bound above the bar is something more points can mend: any other problem (no
    # lock, no velocity model, an optimum beyond the box) ends the stage as it stands.
    if lock.acceptance_problems(chosen, clock_s=None, max_shortfall=math.inf):
        return None
    # Nor when the points have nothing left to lower (a retune's inherited velocity term).
    if lock.hopeless(clock_s=session.clock, points_left=budget.max_points - searched,
                     acceptance_bar=bar) is not None:
        return None
    out_of_time = session.tally.rig_time_s >= budget.max_rig_time_s
    if lock.converged(clock_s=session.clock):
        # No search step is wanted; but the verification may have moved the lock's
        # recommendation away from the verified choice: then that is verified in its place.
        return None if out_of_time else lock.moved_recommendation(
            chosen, short, acceptance_bar=bar, max_moves=config.lock.max_corrections,
            clock_s=session.clock)
    if searched >= budget.max_points or out_of_time:
        return None
    proposal = lock.propose(clock_s=session.clock)
    shots = proposal.shots_per_phase or config.measurement.shots_per_phase
    if session.tally.shots + measurement_shots(phases, shots) > budget.max_shots:
        return None
    return (f"the verified choice's {bound_text(short)} misses the acceptance bar {bar:.1%}; "
            f"the budget has room ({searched} of {budget.max_points} points): searching on")


def bound_text(shortfall: Shortfall) -> str:
    if not math.isfinite(shortfall.upper):
        return (f"predicted shortfall not bounded yet ({shortfall.note or 'no model'})")
    return (f"predicted shortfall {shortfall.estimate:.2%}, bound {shortfall.upper:.2%} "
            f"({shortfall.confidence:.0%})")


def shortfall_numbers(shortfall: Shortfall) -> dict[str, Any]:
    """The predicted shortfall as numbers for result.json and the journal (None: unbounded).

    Keys: ``estimate``, ``upper`` (the bound at ``confidence``), ``confidence``, and the terms
    ``detuning``, ``detuning_upper``, ``velocity``, ``velocity_upper``.
    """
    out = shortfall.to_dict()
    return {key: out[key] for key in ("estimate", "upper", "confidence", "detuning",
                                      "detuning_upper", "velocity", "velocity_upper", "note")}


def acceptance_reason(inversion: float, shortfall: Shortfall,
                      problems: Sequence[tuple[str, str]]) -> str:
    """One line: why a stage was accepted, or why not and what to check."""
    if not problems:
        return (f"verified inversion {inversion:.3f}; {bound_text(shortfall)} within the target")
    checks: list[str] = []
    for _, check in problems:
        if check not in checks:
            checks.append(check)
    return ("not accepted: " + "; ".join(p for p, _ in problems)
            + "; check " + "; ".join(checks))
