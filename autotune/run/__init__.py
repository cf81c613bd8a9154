"""Running a stage and a night: the shell around the analysis that moves the rig, records every
step and survives a kill.

What lives here:

- one stage, propose -> guard -> apply -> acquire -> estimate -> tell -> record, by concern:
  :mod:`~autotune.run.guard` (the effective limits, a move in allowed steps, the budget),
  :mod:`~autotune.run.session` (``Session``: guarded rig calls, bounded retries, journaled
  acquisitions, ``Measurement``), :mod:`~autotune.run.replay` (a stage's records read back for
  a resume), :mod:`~autotune.run.stage` (``run_stage``, an ask/tell strategy),
  :mod:`~autotune.run.guided_stage` (``run_guided_stage``, the phase lock) and
  :mod:`~autotune.run.verification` (its verification and acceptance);
  :mod:`~autotune.run.loop` re-exports their names under the path they always had;
- :mod:`~autotune.run.runner`: one stage as a run: run folder, manifest, result, last good store,
  with its checks before the first move in :mod:`~autotune.run.preflight` (the config against
  the rig's description and the store, a resume's changes, a failure settled safely);
- :mod:`~autotune.run.track`: ``autotune track``, a night in one run folder (the shell around
  :mod:`autotune.analysis.hold` and the guided stages): its state machine in
  :mod:`~autotune.run.night`, with :mod:`~autotune.run.night_settings` (the prepared night, the
  hold's settings, a stage's size), :mod:`~autotune.run.night_ledger` (the journal seen through,
  the night's accounts, what its records say) and :mod:`~autotune.run.night_clock` (its ends and
  its waits for the rig's clock);
- :mod:`~autotune.run.journal`: append-only JSON Lines, durable, replayable, read up to a damage;
- :mod:`~autotune.run.runlock`: one owner per run folder (the OS lock and its holder file);
- :mod:`~autotune.run.display`: the progress line on a terminal, or plain lines (used by the
  command line and the study only).

What it may import: the foundation modules (:mod:`autotune.errors`, :mod:`autotune.plausible`,
:mod:`autotune.progress`, :mod:`autotune.schema`, :mod:`autotune.config`), the analysis
(:mod:`autotune.analysis`), the wire (:mod:`autotune.wire`) and itself; nothing of the lab kit,
the report, the study or the command line (tests/test_layout.py holds this): a stage talks to
any rig through :class:`autotune.wire.rig.Rig`.
"""

__all__ = ["display", "guard", "guided_stage", "journal", "loop", "night", "night_clock",
           "night_ledger", "night_settings", "preflight", "replay", "runlock", "runner", "session",
           "stage", "track", "verification"]
