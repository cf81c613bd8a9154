"""The benchmark study: what a user pays to calibrate, the oracle floor, overhead, a night's memory.

Run ``python -m autotune.bench`` (full study), ``--quick`` (a few minutes) or ``--tiny`` (the
smoke test's sizes). It writes a JSON file (``--out``, default
``benchmarks/results/latest.json``) and prints a table. Every figure is measured on the bundled
SIMULATED rig (:class:`autotune.kit.server.LocalRig`: the real protocol's encoder, server handler
and parsers without a socket). This module is a study on the simulated rig, like the dry run,
so it is one of the few places in ``autotune`` that imports ``drivers_sim``; it does so lazily,
inside the functions that build rigs and jobs, so importing ``autotune`` never pulls it in (nor
dask, imported only when a run uses it).

Scenario families
-----------------
Scenarios are drawn by seeded random perturbation of the demo rig (``configs/sim-rig.toml``),
never picked by hand, in families reported separately (:data:`FAMILIES`):

- ``main``: uniform over :data:`SCENARIO_RANGES` from the plan's seed;
- ``held_out``: the same ranges from :data:`HELD_OUT_SEED`, fixed here and never used to tune;
- ``mismatch``: physics that a method built on the Gaussian mode and a linear Stark map does
  not assume: a non-Gaussian mode profile (super-Gaussian or asymmetric, equally likely, its
  parameter drawn from :data:`MISMATCH_PROFILES`), a hidden Stark-coefficient error up to
  +-15 % and a stray electrode field, plus the main ranges (:data:`MISMATCH_RANGES`), from
  :data:`MISMATCH_SEED`;
- ``velocity_physics`` and its held-out twin: what makes the inversion depend on velocity and
  what degrades the signal (Ramsey arm and detuning, velocity spread, source, temperature,
  atoms per sample, detector), plus the main ranges;
- ``zones_set_once`` and its held-out twin: the velocity-physics ranges plus Ramsey zones whose
  power was set once, at a velocity drawn over the run config's velocity box.

Sections of the study
---------------------
1. What a user pays, per family and strategy: the whole stage's shots (search, the final
   detuning scan and the verification) until the stage ends by its own rule, as a multiple of
   the oracle floor; the final true ratio (true inversion at the verified set-points over the
   true best at that moment); the scenarios that end below 98 % and below 97 % of the true best.
   Secondary: the shots until the recommendation first reaches ``THRESHOLD`` of the true best
   (a failure counts as infinitely many shots in the quantiles, "never" in the table).
2. Oracle floor: the shots of the final verification alone, measured at the true best
   set-points (a one-point run whose box is the true best), so its precision equals that of
   every strategy's verification.
3. Optimiser overhead: wall time of the Bayesian strategy's ``ask`` plus ``tell`` as the told
   points grow, against the rig time of one step at the rig's repetition rate.
4. A long run: a calibration, then back-to-back retunes (drift on, a thermal step every two rig
   hours, alternating sign) for several hundred steps; traced (tracemalloc) and resident
   (getrusage) memory at checkpoints.
5. Retune: after each calibration of the strategies in ``retune_strategies``, a 15 kHz thermal
   step and a retune; its whole stage against the oracle floor, its final true ratio, and the
   checks that judged a moved peak still good (the true ratio at the old set-points right
   after the step below ``THRESHOLD`` while the check passed).

The targets (issues 5 and 10) are printed beside the measured ratios with "met" or "MISSED";
those of the guided strategy :data:`GUIDED` say "not run" when it is not in the run.

Running the scenarios
---------------------
Jobs are plain JSON (the configuration's parsed TOML, the rig's checked configuration as a
dict, the scenario) and so are their results, so a job gives the same result wherever it runs:
in this process (``--serial`` or ``--workers 1``), on a local dask.distributed cluster of
``--workers`` processes (the default, 2), or on an existing cluster (``--scheduler ADDRESS``).
Every job runs with one BLAS thread. dask's own messages between its processes use pickle:
give ``--scheduler`` only a cluster on a network you trust.

Layout
------
:mod:`~autotune.bench.plan` (sizes, seeds, thresholds, each strategy's configuration),
:mod:`~autotune.bench.scenarios` (the families and their draws), :mod:`~autotune.bench.jobs`
(a calibration and the oracle floor as plain JSON), :mod:`~autotune.bench.memory` (the long run,
the optimiser's overhead), :mod:`~autotune.bench.night_rig` (the watched rig of a held night),
:mod:`~autotune.bench.worker` (a job by its kind), :mod:`~autotune.bench.night_study`,
:mod:`~autotune.bench.summaries`, :mod:`~autotune.bench.targets`, :mod:`~autotune.bench.study`
(the jobs mapped and summarised), :mod:`~autotune.bench.tables` and
:mod:`~autotune.bench.command` (the command line; ``__main__.py`` runs it).

What it may import: everything of autotune except the command line, and ``drivers_sim``
(lazily, where it builds a simulated rig); nothing imports the study
(tests/test_layout.py holds this).
"""

from __future__ import annotations

from autotune.bench.plan import (DEFAULT_OUT, DEFAULT_RIG_CONFIG, DEFAULT_RUN_CONFIG, GUIDED,
                                 LOWER_THRESHOLD, REPO, RETUNE_STRATEGIES, STRATEGIES, StudyPlan,
                                 THRESHOLD, check_plan, family_scenarios, family_seed, plan_for,
                                 strategy_configs)
from autotune.bench.scenarios import (FAMILIES, HELD_OUT_SEED, MISMATCH_PROFILES, MISMATCH_RANGES,
                                      MISMATCH_SEED, SCENARIO_RANGES, ScenarioFamily,
                                      make_scenarios)
from autotune.bench.night_rig import night_steps
from autotune.bench.night_study import night_labels
from autotune.bench.worker import run_job
from autotune.bench.summaries import quantiles
from autotune.bench.study import run_study
from autotune.bench.tables import format_table
from autotune.bench.command import (main, write_result)

__all__ = ["REPO", "DEFAULT_RUN_CONFIG", "DEFAULT_RIG_CONFIG", "DEFAULT_OUT", "THRESHOLD",
           "LOWER_THRESHOLD", "STRATEGIES", "GUIDED", "RETUNE_STRATEGIES", "StudyPlan", "plan_for",
           "check_plan", "strategy_configs", "family_seed", "family_scenarios", "SCENARIO_RANGES",
           "MISMATCH_RANGES", "MISMATCH_PROFILES", "HELD_OUT_SEED", "MISMATCH_SEED", "FAMILIES",
           "ScenarioFamily", "make_scenarios", "night_steps", "night_labels", "run_job",
           "quantiles", "run_study", "format_table", "main", "write_result"]
