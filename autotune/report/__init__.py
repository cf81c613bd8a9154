"""The morning report: figures, an HTML page and a text summary of runs (reads only).

The report never touches a rig and never changes a run's own files; it only adds its figures
and its page next to them (or under ``--out DIR``). It reads

- a **run folder** (``manifest.json``, ``journal.jsonl``, ``result.json`` once the run ended):
  finished, stopped, or still running / killed (no ``result.json``; a last journal line cut by
  a kill is ignored, see :func:`autotune.run.journal.read_journal`);
- a **folder of run folders**: a dry run's output (``calibrate/``, ``retune/``, plus
  ``last-good.json`` and ``rig.log``) or a night of ``track`` (``cycle-0000/``, ...). Every run
  gets a section, and the folder a timeline of all of them against rig time.

A single run folder of the command ``track`` (one journal for the whole night) also gets the
timeline. Journal record types and measurement labels this module does not know are ignored
(counted in the page's notes), so it keeps working while the loop learns new steps.

Figures (PNG, matplotlib's Agg canvas, no display needed), each returned as a
:class:`matplotlib.figure.Figure` by its drawing function before it is saved. For a calibration
or a retune, in the order a reader asks:

1. ``fringes``: both Ramsey fringes P_g(phi) at the chosen set-points, the data with binomial
   (Wilson) error bars at the run's confidence, and ``a + b cos phi + c sin phi`` refitted from
   the journal's counts with :func:`autotune.analysis.fringe.fit_fringe`;
2. ``phase-shift``: why this detuning: the photon phase shift against detuning with the phase
   lock's own journaled curve and band, the phase at the peak and the chosen detuning;
3. ``absorption``: why this velocity: absorption against velocity with the lock's quadratic,
   the velocity of least absorption with its interval and the chosen velocity; the inversion
   below;
4. ``map``: where it measured: the points over the (velocity, detuning) box, numbered in order,
   the chosen point and, in a dry run, the simulator's true best (no surface: the report draws
   only models that decided);
5. ``scan``: inversion against detuning for the lock steps and scans;
6. ``progress``: the best inversion measured so far against cumulative shots.

For a night of ``track``: ``night`` (every check's inversion with the reference and the floor,
the phase error, the detuning held with the lock's peak and the corrections, the sequential
statistics against their thresholds with the alarms, the beam share against the budget, the
retunes and calibrations) and the last check's ``fringes``. For a folder of runs: ``timeline``
(inversion, detuning and corrections against rig time, stage boundaries, a dry run's thermal
step).

Flags (:func:`run_flags`) list what a person should look at first: search points piled at an
edge of the box, a recommendation at an edge, a phase shift far from pi at the chosen point, a
poor fringe fit, a run that did not end (or ended badly), a failed return to safe set-points.

Before the flags, the report says what a reader must know first
(:mod:`~autotune.report.notices`): a run still being written by another process, and a damaged
journal (shown up to its first damaged line); the terminal prints them as ``NOTE:`` lines, the
page in a box at its top.

The package, by concern: :mod:`~autotune.report.model` (the journal read into runs),
:mod:`~autotune.report.notices`, :mod:`~autotune.report.flags`, :mod:`~autotune.report.text`
(headers and the terminal summary),
:mod:`~autotune.report.figures` (one module per kind of figure), :mod:`~autotune.report.build`
(the report of a folder) and :mod:`~autotune.report.page` (the HTML page and the files).

It may import the foundation (errors, plausible, progress, schema, config), the pure analysis
(to refit what the journal holds), the wire's vocabulary (the field states) and the run
package's journal reader; never the lab kit, the command line or the study.
"""

from __future__ import annotations

from autotune.report.build import Report, ReportFigure, build_report
from autotune.report.figures.fringes import figure_fringes
from autotune.report.figures.map import figure_map
from autotune.report.figures.phase import figure_phase_shift
from autotune.report.figures.progress import figure_progress
from autotune.report.figures.scan import figure_scan
from autotune.report.figures.timeline import figure_timeline
from autotune.report.flags import Flag, fit_p_value, run_flags
from autotune.report.model import (FIGURE_NAME, HTML_NAME, SCAN_LABELS, SEARCH_LABELS,
                                   Measurement, Run, find_runs, load_run)
from autotune.report.page import render_html, write_report
from autotune.report.text import format_text

__all__ = [
    "FIGURE_NAME",
    "HTML_NAME",
    "SCAN_LABELS",
    "SEARCH_LABELS",
    "Measurement",
    "Run",
    "Flag",
    "ReportFigure",
    "Report",
    "find_runs",
    "load_run",
    "run_flags",
    "fit_p_value",
    "figure_fringes",
    "figure_progress",
    "figure_map",
    "figure_scan",
    "figure_phase_shift",
    "figure_timeline",
    "build_report",
    "format_text",
    "render_html",
    "write_report",
]
