"""The ``autotune`` command: the only place that configures logging and exits.

Commands
--------
rig        serve the bundled simulated rig over the bus
serve      serve a lab's rig driver (DRIVER.toml) over the bus
probe      check a rig server against the wire protocol, rule by rule
calibrate  full calibration of a rig
retune     check the last good calibration; search a narrowed box if it no longer holds
dry-run    start the simulated rig, calibrate, thermal step, retune, compare with the truth
report     summary and figure of a run folder
track      hold the condition through the night: a lock, a sequential test, retunes

Exit codes
----------
0    success (calibration accepted, retune accepted or still good)
1    internal error (a bug of autotune): the rig was sent to its safe set-points, the journal
     closed; the run can be resumed
2    bad input: configuration, command line, missing or damaged files, a refused set-point,
     a last good store that cannot be written, a run folder in use by another process
3    rig unreachable or failing: timeout, refusal, protocol error, interlock that stayed set,
     a rig that kept answering with other set-points than those applied, a rig leased to
     another client (``--wait-lease-s`` waits for it)
4    the stage was not accepted: the verified inversion is below [acceptance] min_inversion,
     or (phase lock) the predicted shortfall's bound misses the target, the optimum is not
     bracketed inside the box, or the lock was not established; one line says what to check;
     the last good calibration is untouched
130  stopped by SIGINT/SIGTERM (the message says whether the rig confirmed its safe
     set-points; the journal is closed and the run can be resumed)

``rig`` and ``serve`` exit 0 after a clean stop (SIGINT/SIGTERM), 1 if the endpoint cannot be
bound, 2 for a bad configuration, flag, key file or driver class, and ``serve`` 3 if the driver
fails while starting (its hardware cannot be reached). ``probe`` exits 0 when every rule passes
(warnings allowed), 1 when a rule fails, 2 for bad input, 3 if the rig does not answer, 5 when
no rule failed but some were not run (no consent to move the rig, an interlock, busy, or a
range too narrow for a rule), 130 on SIGINT.

Layout
------
One module per command group: :mod:`~autotune.cli.rig_side` (``rig``, ``serve``, ``probe``),
:mod:`~autotune.cli.stages` (``calibrate``, ``retune``, ``track``), :mod:`~autotune.cli.dry_run`
(``dry-run``), :mod:`~autotune.cli.report_command` (``report``); beside them
:mod:`~autotune.cli.parser` (every option and help text, and :func:`main`),
:mod:`~autotune.cli.console` (the log lines and the progress line) and
:mod:`~autotune.cli.common` (exit codes, signals, connecting to and claiming a rig, errors to
exit codes). ``python -m autotune.cli`` runs :func:`main` (``__main__.py``).

What it may import: everything of autotune below it (the foundation modules, the analysis, the
wire, the lab kit, a run, the report) and ``drivers_sim`` where ``rig`` and ``dry-run`` start
the simulated rig; nothing of the study (tests/test_layout.py holds this).
"""

from __future__ import annotations

from autotune.cli.common import (EXIT_BAD_INPUT, EXIT_BELOW_ACCEPTANCE, EXIT_INTERNAL,
                                 EXIT_INTERRUPTED, EXIT_OK, EXIT_RIG)
from autotune.cli.parser import main

__all__ = ["main", "EXIT_OK", "EXIT_INTERNAL", "EXIT_BAD_INPUT", "EXIT_RIG",
           "EXIT_BELOW_ACCEPTANCE", "EXIT_INTERRUPTED"]
