"""Progress on a person's terminal: the shell's side of :mod:`autotune.progress`.

The commands (``autotune`` and ``python -m autotune.bench``) show where a long run stands:

- on a terminal, one line updated in place (drawn with tqdm); the console log lines are written
  above it, never over it;
- when the output is not a terminal (a file, a pipe, a service's journal), plain lines, at most
  one a minute for a stage (and one when each stage starts, and after each check of a night);
- nothing with ``--quiet``.

Nothing here is imported by the loop or the runner: they only call an observer.
"""

from __future__ import annotations

import logging
import math
import os
import sys
import time
from collections.abc import Callable
from typing import Any, Literal

from autotune.progress import (NightProgress, StageProgress, count_text, rough_duration_text,
                               setpoint_value_text)

__all__ = ["ProgressMode", "ProgressDisplay", "progress_mode", "stage_progress_text",
           "night_progress_text", "progress_text", "shots_text"]

ProgressMode = Literal["terminal", "plain", "off"]


def progress_mode(*, quiet: bool, stream: Any = None) -> ProgressMode:
    """``off`` when quiet; ``terminal`` when ``stream`` (default stderr) is a terminal;
    ``plain`` otherwise."""
    if quiet:
        return "off"
    stream = sys.stderr if stream is None else stream
    isatty = getattr(stream, "isatty", None)
    return "terminal" if callable(isatty) and isatty() else "plain"


def shots_text(shots: int) -> str:
    """Shots in thousands past a thousand: ``"750"``, ``"4.5k"``, ``"1500k"``."""
    if shots < 1000:
        return str(shots)
    return f"{shots / 1000:.1f}k" if shots < 10_000 else f"{shots / 1000:.0f}k"


def stage_progress_text(p: StageProgress) -> str:
    """One progress line of a stage, most telling first: the stage and its step of the point
    budget with the measurement in progress, the time to go at the rig's pace (at most), the
    best inversion so far with its interval, shots and rig time against the budget."""
    doing = (f"{p.label} {shots_text(p.measurement_shots)}/"
             f"{shots_text(p.measurement_shots_planned)}") if p.label else "starting"
    parts = [f"{p.stage} step {p.step}/{p.max_steps} ({doing})",
             f"<= {rough_duration_text(p.remaining_s)} to go"]
    if p.best_inversion is not None and p.best_interval is not None:
        low, high = p.best_interval
        parts.append(f"best {p.best_inversion:.3f} [{low:.3f}, {high:.3f}]")
    parts.append(f"shots {shots_text(p.shots)}/{shots_text(p.max_shots)}")
    parts.append(f"rig time {p.rig_time_s / 60:.1f}/{p.max_rig_time_s / 60:.0f} min")
    return " | ".join(parts)


def night_progress_text(p: NightProgress) -> str:
    """One progress line of a night between its stages, most telling first (a narrow terminal
    cuts the end): rig time of the night against its end, the held set-points, the last check
    with its interval and what it decided, the next check, the beam share of holding against its
    budget, and the counts."""
    end = f"/{p.end_s / 3600:.1f}" if p.end_s is not None else ""
    held = ", ".join(setpoint_value_text(k, v) if k in ("velocity", "detuning") else
                     f"{k} {setpoint_value_text(k, v)}" for k, v in p.setpoints.items())
    parts = [f"night {p.night_s / 3600:.1f}{end} h", f"held {held}" if held else "held nothing"]
    if p.inversion is not None and p.interval is not None:
        parts.append(f"check {p.inversion:.3f} [{p.interval[0]:.3f}, {p.interval[1]:.3f}]"
                     + (f" {p.action}" if p.action else ""))
    if p.event == "wait" and p.next_in_s is not None:
        parts.append(f"next in {rough_duration_text(p.next_in_s)}")
    share = "-" if p.holding_share is None else f"{p.holding_share:.1%}"
    parts.append(f"beam {share} (budget {p.budget_fraction:.0%})")
    parts.append(", ".join([count_text(p.checks, "check"), count_text(p.corrections, "correction"),
                            count_text(p.alarms, "alarm"), count_text(p.retunes, "retune"),
                            count_text(p.calibrations, "calibration")]))
    return " | ".join(parts)


def progress_text(item: StageProgress | NightProgress) -> str:
    """The line of a stage's or a night's progress item."""
    if isinstance(item, NightProgress):
        return night_progress_text(item)
    return stage_progress_text(item)


class ProgressDisplay:
    """Shows progress items as the mode asks; the object itself is the observer.

    Parameters
    ----------
    mode : {"terminal", "plain", "off"}
        See :func:`progress_mode`.
    render : callable
        Turns one progress item into its line of text.
    stream : file, optional
        Where to show it (default: stderr, beside the log).
    plain_every_s : float
        Fewest seconds between two plain lines; an item whose ``event`` is ``"start"`` (a
        stage began) or ``"check"`` (a night's check was assessed) is always shown.

    Use it as a context manager: on a terminal it draws the line on entry, moves the console
    log handlers of ``stream`` above the line, and on exit clears the line and restores them.
    """

    #: Fewest seconds between two redraws of the terminal line for acquisitions.
    REDRAW_S = 0.1
    #: Events shown as plain lines whatever the time since the last: a stage's start and a
    #: night's check.
    ALWAYS = ("start", "check")

    def __init__(self, mode: ProgressMode, render: Callable[[Any], str], stream: Any = None,
                 plain_every_s: float = 60.0) -> None:
        self.mode = mode
        self.render = render
        self.stream = sys.stderr if stream is None else stream
        self.plain_every_s = plain_every_s
        self._bar: Any = None
        self._moved: list[tuple[logging.Handler, logging.Handler]] = []
        self._last = -math.inf

    def __enter__(self) -> ProgressDisplay:
        if self.mode == "terminal":
            from tqdm import tqdm

            # The line is cut to the terminal's width here (_width), not by tqdm, whose own
            # measure of a terminal that reports no size (0 x 0) would hide the line.
            self._bar = tqdm(file=self.stream, bar_format="{desc}", leave=False,
                             disable=False, ncols=10_000, nrows=10_000)
            root = logging.getLogger()
            self._moved = [(h, _AboveProgressLine(h)) for h in root.handlers
                           if type(h) is logging.StreamHandler and h.stream is self.stream]
            for original, above in self._moved:
                root.removeHandler(original)
                root.addHandler(above)
        return self

    def __exit__(self, *exc: object) -> None:
        root = logging.getLogger()
        for original, above in self._moved:
            root.removeHandler(above)
            root.addHandler(original)
        self._moved = []
        if self._bar is not None:
            self._bar.close()
            self._bar = None

    def _width(self) -> int:
        try:
            columns = os.get_terminal_size(self.stream.fileno()).columns
        except (AttributeError, OSError, ValueError):
            columns = 0
        return columns if columns > 20 else 100

    def __call__(self, item: Any) -> None:
        if self.mode == "off":
            return
        now = time.monotonic()
        event = getattr(item, "event", None)
        if self.mode == "terminal":
            if self._bar is None:
                return
            if event == "acquisition" and now - self._last < self.REDRAW_S:
                return
            # Cut to the terminal's width (asked at every redraw: it may be resized), so the
            # line never wraps and is always overwritten in place.
            self._bar.set_description_str(self.render(item)[: self._width() - 1], refresh=True)
        else:
            if event not in self.ALWAYS and now - self._last < self.plain_every_s:
                return
            print(f"progress: {self.render(item)}", file=self.stream, flush=True)
        self._last = now


class _AboveProgressLine(logging.Handler):
    """A console log handler that writes through tqdm, which clears the progress line, writes
    the log line and draws the progress line again below it."""

    def __init__(self, original: logging.StreamHandler) -> None:  # type: ignore[type-arg]
        super().__init__(original.level)
        self.setFormatter(original.formatter)
        for console_filter in original.filters:  # e.g. the CLI's merging of repeated warnings
            self.addFilter(console_filter)
        self.stream = original.stream

    def emit(self, record: logging.LogRecord) -> None:
        from tqdm import tqdm

        try:
            tqdm.write(self.format(record), file=self.stream)
        except Exception:  # noqa: BLE001 - logging's own convention for a failed emit
            self.handleError(record)
