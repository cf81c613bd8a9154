"""The pure analysis: counts to inversions, the search over set-points, the phase lock and the
night's hold, as functions and objects that do no I/O (no socket, file, clock or terminal).

What lives here:

- :mod:`~autotune.analysis.fringe`: counts -> fringe fit -> inversion with its uncertainty;
- :mod:`~autotune.analysis.search`: the Gaussian-process search, the only module that imports
  scikit-optimize, re-exporting :mod:`~autotune.analysis.search_types` (the search space, the
  results and proposals, the strategies' ask/tell interface) and
  :mod:`~autotune.analysis.search_scans` (the grid, coordinate and random scans);
- :mod:`~autotune.analysis.guided`: the phase lock (``PhaseLockSearch``), with its models by
  concern in :mod:`~autotune.analysis.lock_fit` (the detuning lock's fit),
  :mod:`~autotune.analysis.velocity_model` (the inversion along velocity),
  :mod:`~autotune.analysis.shortfall` (the bound as data), :mod:`~autotune.analysis.next_point`
  (the choice of the next point), :mod:`~autotune.analysis.retune_verdict` (a retune's
  verdict) and :mod:`~autotune.analysis.lock_settings` (its settings and the prior a
  calibration stores), and its methods by concern in classes it inherits:
  :mod:`~autotune.analysis.guided_phase` (the phase observations, the detuning lock's fit, the
  phase at the peak), :mod:`~autotune.analysis.guided_absorption` (absorption fit, inversion
  curve, velocity plan), :mod:`~autotune.analysis.guided_shortfall` (shortfall, acceptance,
  stopping) and :mod:`~autotune.analysis.guided_proposals` (step shots, the next point);
- :mod:`~autotune.analysis.strategies`: a strategy by its configured name;
- :mod:`~autotune.analysis.hold`: the night's pure core, described and re-exported there, over
  :mod:`~autotune.analysis.hold_lock` (drift lock, sequential test, settings),
  :mod:`~autotune.analysis.hold_signal` (the checks' noise and signal),
  :mod:`~autotune.analysis.hold_plan` (plan and cadence of the checks),
  :mod:`~autotune.analysis.hold_check` (one check read; what the night keeps of its measurements)
  and :mod:`~autotune.analysis.hold_budget` (beam budget, recovery sizing, rig time unheld).

What it may import: the foundation modules (:mod:`autotune.errors`, :mod:`autotune.plausible`,
:mod:`autotune.progress`, :mod:`autotune.schema`, :mod:`autotune.config`) and itself; of the wire
only :mod:`autotune.wire.rig`, for a measurement's shot count (``measurement_shots``, the one
place that says what a measurement costs; that module imports only the wire's vocabulary);
nothing of the lab kit, a run, the report, the study or the command line
(tests/test_layout.py holds this). The package imports no module of its own here: import the
module you need (``from autotune.analysis.fringe import estimate_inversion``).
"""

__all__ = ["fringe", "guided", "guided_absorption", "guided_phase", "guided_proposals",
           "guided_shortfall", "hold", "hold_budget", "hold_check", "hold_lock", "hold_plan",
           "hold_signal", "lock_fit", "lock_settings", "next_point", "retune_verdict", "search",
           "search_scans", "search_types", "shortfall", "strategies", "velocity_model"]
