"""The terminal's log lines and progress: the only place that configures logging and renders
it (short lines in units; ``log.jsonl`` keeps everything)."""

from __future__ import annotations

import argparse
import atexit
import logging
import math
import re
import sys
from pathlib import Path
from typing import Any

import structlog

from autotune.progress import setpoint_value_text
from autotune.run.display import ProgressDisplay, progress_mode, progress_text


# -- logging -----------------------------------------------------------------------------

#: Keys whose value is a set of set-points ({name: value}), shown in the set-point's units.
_SETPOINT_KEYS = frozenset({"setpoints", "target", "applied", "from", "best_setpoints"})
#: Keys left out of a console line: shown elsewhere on the line, or plumbing.
_CONSOLE_HIDDEN = frozenset({"timestamp", "level", "event", "logger", "logger_name", "run",
                             "stage", "command", "what", "reason", "exception", "msg_id",
                             "_record", "_from_structlog",
                             # a retune's verdict says both in words in its reason
                             "still_good", "in_range"})


def _setpoint_text(name: str, value: Any) -> str:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return f"{name} {value}"
    return f"{name} {setpoint_value_text(name, float(value))}"


def _console_value(key: str, value: Any) -> str | None:
    """One value in the units a physicist reads; None to leave it out of the console line."""
    if key in _SETPOINT_KEYS and isinstance(value, dict):
        return ", ".join(_setpoint_text(k, v) for k, v in value.items())
    if key == "counts" and isinstance(value, dict):
        return " ".join(f"{k} {v}" for k, v in value.items())
    if value is None or isinstance(value, dict | list | tuple | set):
        return None  # nothing to show; nested data stays in the run folder's log.jsonl
    if isinstance(value, bool) or not isinstance(value, float):
        return str(value)
    if key in ("velocity",) or key.endswith("_m_per_s"):
        return f"{value:.1f} m/s"
    if key == "detuning" or key.endswith("_hz"):
        return f"{value / 1e3:+.2f} kHz"
    if key.endswith("_rad"):
        return f"{value / math.pi:.3f} pi"
    if key.endswith("_s"):
        return f"{value:.1f} s"
    if "inversion" in key or key in ("predicted", "absorption", "stderr"):
        return f"{value:.3f}"
    return f"{value:.4g}"


def _console_name(key: str) -> str:
    """A key as words, its unit suffix dropped (the value carries the unit shown); a second
    set of set-points is named (``from ...``, ``target ...``), the one in force is not."""
    for suffix in ("_m_per_s", "_hz", "_rad", "_s"):
        if key.endswith(suffix) and key != suffix[1:]:
            key = key[: -len(suffix)]
            break
    return key.replace("_", " ")


#: A console line's length at most (characters); the run folder's log.jsonl keeps the rest.
CONSOLE_WIDTH = 150
_MORE = " [...]"


def _fit_console(line: str, head: str) -> str:
    """``line`` if short enough; else its head without the details, cut at the last clause
    boundary that fits and marked ``[...]`` (the whole text is in the run's log.jsonl)."""
    if len(line) <= CONSOLE_WIDTH:
        return line
    if len(head) <= CONSOLE_WIDTH:
        return head
    room = CONSOLE_WIDTH - len(_MORE)
    # The decision usually ends the text, after its last top-level ': ': kept when short.
    depth, tail = 0, ""
    for k, char in enumerate(head):
        depth += {"(": 1, ")": -1}.get(char, 0)
        if depth == 0 and head.startswith(": ", k) and k > len(head) - 70:
            tail = head[k:]
            break
    room = CONSOLE_WIDTH - len(_MORE) - len(tail)
    # A whole clause if one ends late enough, else whole words; never inside parentheses.
    depth, clause, word = 0, -1, -1
    for k, char in enumerate(head[:room]):
        depth += {"(": 1, ")": -1}.get(char, 0)
        if depth == 0 and char == " ":
            word = k
            if head[k - 1] in ";:,":
                clause = k - 1
    cut = clause if clause > 0.6 * room else word if word > room // 2 else room
    return head[:cut].rstrip(" ,;:") + _MORE + tail


def _console_line(_logger: Any, _method: str, event_dict: dict[str, Any]) -> str:
    """A log event as one short line: time, stage, what happened and why, values in units.

    Every number is rounded for reading; the run folder's ``log.jsonl`` keeps full precision
    and the nested details left out here.
    """
    stamp = str(event_dict.get("timestamp", ""))
    clock = stamp[11:19] if len(stamp) >= 19 else stamp
    level = str(event_dict.get("level", "info"))
    stage = event_dict.get("stage") or event_dict.get("command")
    event = str(event_dict.get("event", ""))
    parts = [clock]
    if level not in ("info", "debug"):
        parts.append(level.upper())
    if stage:
        parts.append(f"{stage}:")
    if event == "decision":
        head = f"{event_dict.get('what')}: {event_dict.get('reason')}"
    elif event == "estimate" and "inversion" in event_dict:
        interval = ""
        if "inversion_low" in event_dict and "inversion_high" in event_dict:
            interval = (f" [{event_dict['inversion_low']:.3f}, "
                        f"{event_dict['inversion_high']:.3f}]")
        head = (f"{event_dict.get('label')} {event_dict.get('point')}: inversion "
                f"{event_dict['inversion']:.3f}{interval}")
    else:
        head = event
    shown = {"inversion", "inversion_low", "inversion_high", "label", "point"} \
        if event == "estimate" else set()
    details = []
    for key, value in event_dict.items():
        if key in _CONSOLE_HIDDEN or key in shown:
            continue
        text = _console_value(key, value)
        if text is not None:
            details.append(text if key == "setpoints" else f"{_console_name(key)} {text}")
    line = " ".join(parts + [head])
    if details:
        line += " (" + "; ".join(details) + ")"
    line = _fit_console(line, " ".join(parts + [head]))
    if event_dict.get("exception"):
        line += "\n" + str(event_dict["exception"])
    return line


class _MergeRepeats(logging.Filter):
    """Merge a warning repeated on the console: the same line again (its numbers aside) is held
    back and counted, and one line says how many were held before the next different line (or
    at exit). The run folder's log.jsonl, written by another handler, keeps every one."""

    _NUMBERS = re.compile(r"[-+]?\d[\d.,:]*(?:e[-+]?\d+)?")

    def __init__(self, handler: logging.Handler) -> None:
        super().__init__()
        self.handler = handler
        self.key: str | None = None
        self.count = 0
        atexit.register(self.flush)

    def filter(self, record: logging.LogRecord) -> bool:
        if getattr(record, "_merge_note", False):
            return True
        try:
            line = self.handler.format(record)
        except Exception:  # noqa: BLE001 - a line that cannot be formatted is not merged
            return True
        key = self._NUMBERS.sub("#", line.split(" ", 1)[-1])
        if record.levelno >= logging.WARNING and key == self.key:
            self.count += 1
            return False
        self.flush()
        self.key = key if record.levelno >= logging.WARNING else None
        return True

    def flush(self) -> None:
        """Say how many repeats were held back, if any."""
        if not self.count:
            return
        # The journal is a stage's module (log_to_run_folder): imported where it is used.
        from autotune.run.journal import LOG_NAME

        count, self.count = self.count, 0
        note = logging.makeLogRecord({
            "msg": f"the warning above repeated {count} more time{'s' if count > 1 else ''} "
                   f"(each in the run folder's {LOG_NAME})",
            "levelno": logging.WARNING, "levelname": "WARNING", "_merge_note": True})
        for handler in logging.getLogger().handlers:
            if self in handler.filters:
                handler.handle(note)


def configure_logging(level: str) -> None:
    """Short readable lines on stderr at ``level``; a JSON file handler (every level, full
    precision) is added per run folder."""
    shared: list[Any] = [
        structlog.contextvars.merge_contextvars,
        structlog.stdlib.add_log_level,
        structlog.stdlib.add_logger_name,
        structlog.processors.TimeStamper(fmt="iso", utc=True),
    ]
    structlog.configure(
        processors=[*shared, structlog.stdlib.ProcessorFormatter.wrap_for_formatter],
        logger_factory=structlog.stdlib.LoggerFactory(),
        wrapper_class=structlog.stdlib.BoundLogger,
        cache_logger_on_first_use=False,
    )
    handler = logging.StreamHandler(sys.stderr)
    handler.setLevel(level.upper())
    handler.setFormatter(structlog.stdlib.ProcessorFormatter(
        processors=[structlog.stdlib.ProcessorFormatter.remove_processors_meta,
                    structlog.processors.format_exc_info,
                    _console_line],
        foreign_pre_chain=shared,
    ))
    handler.addFilter(_MergeRepeats(handler))
    root = logging.getLogger()
    root.handlers[:] = [handler]
    # The root passes everything of autotune on: the console handler filters by --log-level,
    # the run folder's JSON file keeps the debug lines (moves, acquisitions) too.
    root.setLevel(logging.DEBUG)
    for noisy in ("matplotlib", "PIL", "asyncio", "distributed", "fsspec"):
        logging.getLogger(noisy).setLevel(logging.WARNING)
    configure_logging.shared = shared  # type: ignore[attr-defined]


def log_to_run_folder(run_dir: Path) -> logging.Handler:
    # Imported here: the journal's record models (pydantic, built at import) are a stage's,
    # not the servers' (`autotune rig`, `serve`, `probe` load this module too).
    from autotune.run.journal import LOG_NAME

    run_dir.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(run_dir / LOG_NAME, encoding="utf-8")
    handler.setFormatter(structlog.stdlib.ProcessorFormatter(
        processors=[structlog.stdlib.ProcessorFormatter.remove_processors_meta,
                    structlog.processors.dict_tracebacks,
                    structlog.processors.JSONRenderer()],
        foreign_pre_chain=getattr(configure_logging, "shared", []),
    ))
    logging.getLogger().addHandler(handler)
    return handler


# -- progress ----------------------------------------------------------------------------

def progress_display(ns: argparse.Namespace) -> ProgressDisplay:
    """The progress display of a stage, as the command's options ask (``--quiet``: none); use
    it as a context manager and give it to the run as its progress observer."""
    return ProgressDisplay(progress_mode(quiet=getattr(ns, "quiet", False)), progress_text)


def console_level(ns: argparse.Namespace) -> str:
    """The terminal log level: --log-level if given, else warning with --quiet, else info."""
    return ns.log_level or ("warning" if ns.quiet else "info")
