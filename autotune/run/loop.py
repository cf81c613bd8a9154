"""The closed loop: propose -> guard -> apply -> acquire -> estimate -> tell -> record.

A run is a sequence of *measurements*. Each measurement is one point of set-points, measured as
a fringe of both field states: at each of K Ramsey phases ``2 pi j / K`` the loop acquires the
empty field, then the one-photon field (interleaved, so that a slow drift biases both alike).
Every acquisition is written to the journal as soon as its counts arrive, so a run killed at any
moment loses no shots: :func:`run_stage` given the journal's records re-tells the finished
points to the strategy, completes the unfinished measurement from its missing acquisitions
only, and goes on.

Measurement labels (``label`` in the journal): ``"point"`` for a search point (numbered by
``point``), ``"check"`` for the retune's first measurement at the last good set-points,
``"verify"`` for the final verification at the recommended set-points.

Safety: no set-point reaches the rig unless it lies within the effective limits (the tighter of
the configured limits and those the rig described); a long move is split into steps no larger
than the largest allowed step; on an unrecoverable fault or a stop signal the rig is sent to its
safe set-points before the error propagates.

The loop lives in modules by concern, re-exported here (the names tests and the other modules
of :mod:`autotune.run` have always imported from ``autotune.run.loop``):

- :mod:`~autotune.run.guard`: the effective limits, a move split into allowed steps, budgets;
- :mod:`~autotune.run.session`: the :class:`Session` with the rig, :class:`Measurement`,
  :func:`call_with_recovery`;
- :mod:`~autotune.run.replay`: a stage's journal records read back for a resume;
- :mod:`~autotune.run.stage`: :func:`run_stage` (an ask/tell strategy) and :class:`StageOutcome`;
- :mod:`~autotune.run.guided_stage`: :func:`run_guided_stage` (the phase lock);
- :mod:`~autotune.run.verification`: the guided stage's verification and acceptance.
"""

from __future__ import annotations

from autotune.run.guard import Budget, effective_limits, plan_moves, retune_box
from autotune.run.guided_stage import GUIDED_LABELS, lock_settings, run_guided_stage
from autotune.run.replay import replay_records
from autotune.run.session import Measurement, Session, call_with_recovery, ramsey_phases
from autotune.run.stage import (
    StageOutcome,
    build_strategy,
    child_seed,
    quadratic_peak,
    run_stage,
    search_space,
)
from autotune.run.verification import acceptance_reason, shortfall_numbers


__all__ = [
    "Measurement",
    "replay_records",
    "Budget",
    "StageOutcome",
    "effective_limits",
    "plan_moves",
    "ramsey_phases",
    "child_seed",
    "search_space",
    "build_strategy",
    "Session",
    "run_stage",
    "run_guided_stage",
    "lock_settings",
    "GUIDED_LABELS",
    "retune_box",
    "quadratic_peak",
    "call_with_recovery",
    "shortfall_numbers",
    "acceptance_reason",
]
