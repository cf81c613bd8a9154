"""The report of a folder: its runs, headers, flags and figures, drawn but not yet saved."""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from autotune.report.figures.absorption import figure_absorption
from autotune.report.figures.fringes import figure_fringes
from autotune.report.figures.map import figure_map
from autotune.report.figures.night import figure_night
from autotune.report.figures.phase import figure_phase_shift
from autotune.report.figures.progress import figure_progress
from autotune.report.figures.scan import figure_scan
from autotune.report.figures.timeline import figure_timeline
from autotune.report.flags import Flag, run_flags
from autotune.report.model import Run, find_runs, load_run
from autotune.report.notices import Notice, report_notices
from autotune.report.text import header_rows

@dataclass
class ReportFigure:
    """A drawn figure: ``key`` (file stem), its section, the Figure, caption and PNG bytes."""

    key: str
    section: str
    figure: Any
    caption: str
    png: bytes = b""
    file: Path | None = None


@dataclass
class Report:
    """Everything a report shows: what to know first, the runs, their headers and flags, the
    figures."""

    path: Path
    runs: list[Run]
    headers: dict[str, list[tuple[str, str]]]
    flags: dict[str, list[Flag]]
    figures: list[ReportFigure]
    notices: list[Notice] = field(default_factory=list)

    @property
    def multi(self) -> bool:
        """True for a folder of run folders."""
        return len(self.runs) > 1 or self.runs[0].path != self.path

    @property
    def all_flags(self) -> list[tuple[str, Flag]]:
        """Every flag with the name of its run."""
        return [(name, f) for name, flags in self.flags.items() for f in flags]


_RUN_FIGURES = (("fringes", figure_fringes), ("phase-shift", figure_phase_shift),
                ("absorption", figure_absorption), ("map", figure_map), ("scan", figure_scan),
                ("progress", figure_progress))
"""The figures of a calibration or a retune, in the order a reader asks: how good, why this
detuning, why this velocity, where it searched, how it got there."""

_NIGHT_FIGURES = (("fringes", figure_fringes),)
"""A night's figures besides the night itself: the last check's fringes (a map, a running
maximum or a phase against set-point mean nothing over a drifting night)."""


def build_report(path: Path, *, draw: bool = True) -> Report:
    """Read ``path`` (a run folder or a folder of them) and build its report.

    Parameters
    ----------
    path : Path
        A run folder, a dry run's output folder or a ``track`` folder.
    draw : bool
        Draw the figures (matplotlib Figures, not yet saved); False for text only.

    Raises
    ------
    JournalError
        ``path`` is not a run folder and holds none, or a file in it is missing or damaged.
    """
    path = Path(path)
    runs = [load_run(p) for p in find_runs(path)]
    names = _unique_names(runs)
    headers = {names[id(r)]: header_rows(r) for r in runs}
    flags = {names[id(r)]: run_flags(r) for r in runs}
    notices = report_notices(path, runs)
    figures: list[ReportFigure] = []
    if draw:
        multi = len(runs) > 1 or runs[0].path != path
        night = any(r.command == "track" or r.name.startswith("cycle-") for r in runs)
        if multi:
            drawn = figure_timeline(runs, night=night)
            if drawn is not None:
                figures.append(ReportFigure("night" if night else "timeline", "", *drawn))
        for r in runs:
            if r.command == "track":
                drawn = figure_night(r)
                if drawn is not None:
                    figures.append(ReportFigure("night", names[id(r)] if multi else "", *drawn))
            for key, draw_one in (_NIGHT_FIGURES if r.command == "track" else _RUN_FIGURES):
                drawn = draw_one(r)
                if drawn is not None:
                    figures.append(ReportFigure(key, names[id(r)] if multi else "", *drawn))
    return Report(path, runs, headers, flags, figures, notices)


def _unique_names(runs: Sequence[Run]) -> dict[int, str]:
    seen: Counter[str] = Counter()
    out = {}
    for r in runs:
        seen[r.name] += 1
        out[id(r)] = r.name if seen[r.name] == 1 else f"{r.name}-{seen[r.name]}"
    return out


