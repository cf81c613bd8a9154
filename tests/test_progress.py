"""Progress of a running stage: the observer's numbers (autotune.progress), the console log's
lines, and how the commands show both on a terminal, in a file and with --quiet."""

from __future__ import annotations

import dataclasses
import json
import math
import re
import shutil
import sys
from pathlib import Path
from typing import Any

import pytest
import structlog
from structlog.testing import capture_logs

from autotune.cli import console
from autotune.cli import parser as cli_parser
from autotune.cli import stages as cli_stages
from autotune.run import runner
from autotune.bench.study import _counting
from autotune.config import RunConfig, load_config
from autotune.run.display import (
    ProgressDisplay,
    night_progress_text,
    progress_text,
    stage_progress_text,
)
from autotune.run.journal import JOURNAL_NAME, RESULT_NAME, read_journal
from autotune.progress import NightProgress, StageProgress, rough_duration_text
from autotune.kit.server import LocalRig
from cli_helpers import autotune, run_in_a_terminal, tiny_config
from drivers_sim.config import load_sim_config
from drivers_sim.driver import SimulatedDriver
from drivers_sim.rig import SimulatedRig
from rig_process import REPO

SIM = REPO / "configs" / "sim-rig.toml"
#: A float shown with more digits than a person reads (the issue: 16-digit floats in the log).
LONG_FLOAT = re.compile(r"\d\.\d{5,}")
#: A console log line starts with the time of day.
LOG_LINE = re.compile(r"^\d\d:\d\d:\d\d ", flags=re.M)


@pytest.fixture(autouse=True)
def _every_level_reaches_structlog() -> Any:
    """Other tests may leave structlog filtering at warning (the bench does); debug here."""
    saved = structlog.get_config()
    structlog.configure(wrapper_class=structlog.make_filtering_bound_logger(0))
    yield
    structlog.configure(**saved)


def _config(tmp_path: Path) -> RunConfig:
    return load_config(tiny_config(tmp_path / "tiny.toml", "tcp://127.0.0.1:9",
                                   tmp_path / "good.json"))


def _rig(seed: int = 5) -> LocalRig:
    return LocalRig(SimulatedDriver(SimulatedRig(load_sim_config(SIM), seed)))


def _calibrate(tmp_path: Path, name: str, **options: Any) -> tuple[dict[str, Any], Path]:
    run = tmp_path / name
    result = runner.calibrate(_rig(), _config(tmp_path), run, store=tmp_path / f"{name}.json",
                              **options)
    return result, run


def test_observer_follows_the_stage_and_agrees_with_the_journal(tmp_path: Path) -> None:
    """Start, one call per acquisition and per estimate; shots, steps and the best inversion
    are the journal's; the time to go never promises less than what was still to come."""
    seen: list[StageProgress] = []
    result, run = _calibrate(tmp_path, "run", progress=seen.append)
    records = read_journal(run / JOURNAL_NAME)
    assert seen[0].event == "start" and seen[0].shots == 0 and seen[0].step == 0
    assert [p.event for p in seen].count("acquisition") == sum(
        r["type"] == "acquisition" for r in records)
    assert [p.event for p in seen].count("estimate") == sum(r["type"] == "estimate" for r in records)
    shots = [p.shots for p in seen]
    assert shots == sorted(shots) and shots[-1] == result["shots"]
    assert seen[-1].step == result["points"] and seen[-1].max_steps == 8
    estimates = [r["estimate"] for r in records if r["type"] == "estimate"]
    best = max(estimates, key=lambda e: e["inversion"])
    assert seen[-1].best_inversion == best["inversion"]
    assert seen[-1].best_interval == (best["inversion_low"], best["inversion_high"])
    rate = seen[0].repetition_rate_hz
    # Reference: what the stage went on to take (the journal's shots after each moment) at the
    # rig's repetition rate; the bound is the rest of the budget plus one verification.
    for p in seen:
        if "correct" not in {r.get("label") for r in records}:
            assert p.remaining_s * rate >= result["shots"] - p.shots - 1e-6
    assert seen[-1].remaining_s == 0.0
    assert all(p.stage == "calibrate" for p in seen)


def test_progress_never_enters_the_journal(tmp_path: Path) -> None:
    """The same seeded run with and without an observer journals the same records."""
    _, watched = _calibrate(tmp_path, "watched", progress=lambda p: None)
    _, alone = _calibrate(tmp_path, "alone")

    def content(run: Path) -> list[tuple[str, Any]]:
        return [(r["type"], r.get("estimate", r.get("counts"))) for r in read_journal(run / JOURNAL_NAME)]

    assert content(watched) == content(alone)


def test_an_observer_that_fails_is_dropped_and_the_run_goes_on(tmp_path: Path) -> None:
    """A display error never stops a run: one warning, then no more calls."""
    calls = []

    def broken(progress: StageProgress) -> None:
        calls.append(progress)
        raise RuntimeError("terminal gone")

    with capture_logs() as logs:
        result, _ = _calibrate(tmp_path, "run", progress=broken)
    assert result["accepted"] and len(calls) == 1
    assert [e["log_level"] for e in logs if e["event"] == "progress_observer_dropped"] == ["warning"]


def test_a_resumed_stage_starts_from_the_journals_steps_and_best(tmp_path: Path) -> None:
    """Resumed after three estimates: the first report counts them and shows their best."""
    _, run = _calibrate(tmp_path, "run")
    cut = tmp_path / "cut"
    shutil.copytree(run, cut)
    (cut / RESULT_NAME).unlink()
    lines = (cut / JOURNAL_NAME).read_text().splitlines(keepends=True)
    kept, estimates = [], 0
    for line in lines:
        kept.append(line)
        estimates += json.loads(line)["type"] == "estimate"
        if estimates == 3:
            break
    (cut / JOURNAL_NAME).write_text("".join(kept))
    before = [json.loads(line) for line in kept if json.loads(line)["type"] == "estimate"]
    assert {r["label"] for r in before} <= {"lock", "velocity", "relock", "search"}
    seen: list[StageProgress] = []
    runner.calibrate(_rig(), _config(tmp_path), cut, resume=True, store=tmp_path / "s.json",
                     progress=seen.append)
    first = seen[0]
    assert first.event == "start" and first.step == 3
    assert first.best_inversion == max(r["estimate"]["inversion"] for r in before)
    assert first.shots == sum(r["shots"] for r in map(json.loads, kept)
                              if r["type"] == "acquisition")


def test_console_lines_show_units_and_one_line_per_decision(tmp_path: Path) -> None:
    """Moves and acquisitions are debug; each info event renders as one short line with
    velocity to 0.1 m/s, detuning in kHz to 0.01, inversion to 3 digits and no nested dict."""
    with capture_logs() as logs:
        _calibrate(tmp_path, "run")
    levels = {e["event"]: e["log_level"] for e in logs if e["event"] in ("move", "acquisition")}
    assert levels == {"move": "debug", "acquisition": "debug"}
    assert all(e["log_level"] == "debug" for e in logs if e.get("what") == "split_move")
    info = [e for e in logs if e["log_level"] == "info"]
    assert any(isinstance(v, dict) and any(isinstance(x, dict) for x in v.values())
               for e in info for v in e.values()), "the run logs nested details (for log.jsonl)"
    for event in info:
        line = console._console_line(None, "info", {**event, "timestamp": "2026-12-01T22:14:05.1Z",
                                                "level": event["log_level"]})
        assert "\n" not in line and "{" not in line, line
        assert not LONG_FLOAT.search(line), line
        assert line.startswith("22:14:05 calibrate: ")
    estimate = next(e for e in info if e["event"] == "estimate")
    line = console._console_line(None, "info", {**estimate, "level": "info"})
    sp = estimate["setpoints"]
    assert f"velocity {sp['velocity']:.1f} m/s" in line
    assert f"detuning {sp['detuning'] / 1e3:+.2f} kHz" in line
    assert f"inversion {estimate['inversion']:.3f} [{estimate['inversion_low']:.3f}, " in line


def test_console_value_units() -> None:
    """Each kind of value in the unit a physicist reads."""
    assert console._console_value("setpoints", {"velocity": 503.73138, "detuning": -9800.0}) == \
        "velocity 503.7 m/s, detuning -9.80 kHz"
    assert console._console_value("peak_drift_hz", 1234.5678) == "+1.23 kHz"
    assert console._console_value("phase_shift_rad", math.pi) == "1.000 pi"
    assert console._console_value("predicted", 0.72301526727128) == "0.723"
    assert console._console_value("learned", {"slope": 1e-4}) is None
    assert console._console_name("phase_shift_rad") == "phase shift"
    assert console._console_value("learned", None) is None


def test_a_decision_with_two_sets_of_setpoints_names_the_second() -> None:
    """A correction logs the set-points it goes to and those it comes from: the line says which
    is which ('from ...'), and a value that is None is left out (no 'learned None')."""
    line = console._console_line(None, "info", {
        "event": "decision", "what": "correct", "reason": "lock moves the detuning",
        "stage": "calibrate", "timestamp": "2026-12-01T22:14:05.1Z", "level": "info",
        "setpoints": {"velocity": 518.435, "detuning": -5776.6},
        "from": {"velocity": 518.435, "detuning": -341.09}, "learned": None})
    assert line == ("22:14:05 calibrate: correct: lock moves the detuning (velocity 518.4 m/s, "
                    "detuning -5.78 kHz; from velocity 518.4 m/s, detuning -0.34 kHz)")


def test_progress_text_and_durations() -> None:
    """The line names stage, step of the budget, time to go, best with interval, shots, rig time."""
    p = StageProgress(stage="calibrate", event="acquisition", label="verify", step=8,
                      max_steps=40, shots=78_000, max_shots=1_500_000, rig_time_s=520.0,
                      max_rig_time_s=14_400.0, measurement_shots=30_000,
                      measurement_shots_planned=72_000, best_inversion=0.7571,
                      best_interval=(0.6541, 0.8612), remaining_s=280.0)
    assert stage_progress_text(p) == ("calibrate step 8/40 (verify 30k/72k) | <= 5 min to go | "
                                      "best 0.757 [0.654, 0.861] | shots 78k/1500k | "
                                      "rig time 8.7/240 min")
    assert [rough_duration_text(s) for s in (40, 720, 7500)] == ["40 s", "12 min", "2 h 05 min"]


def test_night_progress_text() -> None:
    """A night's line: rig time against its end, the held set-points in the units a physicist
    reads, the last check with its interval and decision, the next check, counts, beam share."""
    p = NightProgress(event="wait", night_s=9000.0, end_s=28_800.0,
                      setpoints={"velocity": 503.24, "detuning": 1234.0}, checks=12,
                      corrections=3, alarms=1, retunes=2, calibrations=0, holding_share=0.0412,
                      budget_fraction=0.05, inversion=0.6123, interval=(0.581, 0.644),
                      action="hold", next_in_s=390.0)
    assert night_progress_text(p) == (
        "night 2.5/8.0 h | held 503.2 m/s, +1.23 kHz | check 0.612 [0.581, 0.644] hold | "
        "next in 6 min | beam 4.1% (budget 5%) | 12 checks, 3 corrections, 1 alarm, 2 retunes, "
        "0 calibrations")
    # Nothing held yet (a night that begins with its calibration): said, not left blank.
    start = dataclasses.replace(p, event="check", setpoints={}, inversion=None, interval=None,
                                checks=0, alarms=0, retunes=0, calibrations=1)
    assert night_progress_text(start) == (
        "night 2.5/8.0 h | held nothing | beam 4.1% (budget 5%) | 0 checks, 3 corrections, "
        "0 alarms, 0 retunes, 1 calibration")
    assert progress_text(p) == night_progress_text(p)


def test_bench_lines_count_jobs_and_time_to_go() -> None:
    """The study's progress: each finished job's line leads with jobs done of the total."""
    lines: list[str] = []
    note = _counting(lines.append, 3)
    assert note is not None
    note("main scenario 0 bayesian")
    note("main scenario 1 bayesian")
    assert lines[0].startswith("[1/3 jobs, ") and lines[1].startswith("[2/3 jobs, ")
    assert lines[1].endswith("to go] main scenario 1 bayesian")


def test_log_level_and_quiet_are_accepted_after_the_command() -> None:
    """--log-level and --quiet parse before or after the command; after wins for the command."""
    parse = cli_parser._parser().parse_args
    ns = parse(["calibrate", "--config", "c.toml", "--quiet", "--log-level", "debug"])
    assert ns.quiet and ns.log_level == "debug"
    ns = parse(["--log-level", "warning", "--quiet", "retune", "--config", "c.toml"])
    assert ns.quiet and ns.log_level == "warning"
    ns = parse(["dry-run"])
    assert not ns.quiet and console.console_level(ns) == "info"
    assert console.console_level(parse(["report", "x", "--quiet"])) == "warning"
    assert parse(["rig", "--quiet", "--log-level", "error"]).server_log_level == "error"


# -- the commands, as a person runs them -----------------------------------------------------

def _tiny_dry_run_args(tmp_path: Path) -> list[str]:
    """A dry run's calibration alone (the demo config's phase lock ends in about a second)."""
    return ["dry-run", "--no-retune", "--out", str(tmp_path / "out")]


def test_plain_lines_when_the_output_is_not_a_terminal(tmp_path: Path) -> None:
    """Piped, with --log-level debug after the command: plain progress lines (no carriage
    returns), moves in the set-points' units, and no log line with long floats or dicts."""
    done = autotune(*_tiny_dry_run_args(tmp_path), "--log-level", "debug")
    assert done.returncode == 0, done.stderr[-3000:]
    assert "\r" not in done.stderr
    assert re.search(r"^progress: calibrate step 0/40 \(starting\) \| <= .* to go \| shots 0/",
                     done.stderr, flags=re.M), done.stderr[-3000:]
    moves = [line for line in done.stderr.splitlines() if "calibrate: move " in line]
    assert moves and all(re.search(r"velocity \d+\.\d m/s, detuning [-+]\d+\.\d\d kHz", line)
                         for line in moves)
    for line in done.stderr.splitlines():
        if LOG_LINE.match(line):
            assert not LONG_FLOAT.search(line) and "{" not in line, line
    assert "calibrate: accepted" in done.stdout


def test_quiet_after_the_command_shows_no_progress_and_no_info(tmp_path: Path) -> None:
    """--quiet: the caution and the results only; the run folder's log keeps everything."""
    done = autotune(*_tiny_dry_run_args(tmp_path), "--quiet")
    assert done.returncode == 0, done.stderr[-3000:]
    assert "progress" not in done.stderr and not LOG_LINE.search(done.stderr)
    assert "CAUTION" in done.stderr and "calibrate: accepted" in done.stdout
    logged = [json.loads(line) for line in
              (tmp_path / "out" / "calibrate" / "log.jsonl").read_text().splitlines()]
    assert {"debug", "info"} <= {e["level"] for e in logged}
    estimate = next(e for e in logged if e["event"] == "estimate")
    assert isinstance(estimate["inversion"], float)  # full precision, not rounded


def test_one_line_updated_in_place_on_a_terminal(tmp_path: Path) -> None:
    """On a terminal: the progress line is redrawn in place (carriage returns), fits the
    width, is cleared before each log line and is gone when the stage ends."""
    columns = 90
    code, output = run_in_a_terminal(
        [sys.executable, "-m", "autotune.cli", *_tiny_dry_run_args(tmp_path)], columns)
    text = output.decode()
    assert code == 0, text[-3000:]
    drawn = re.findall(r"\r(calibrate step \d+/40 \([^\r\n]*)", text)
    assert len(drawn) >= 5, text[-3000:]
    assert all(len(line) < columns for line in drawn)
    assert any("best " in line for line in drawn) and any("to go" in line for line in drawn)
    # A log line is written after the progress line was erased (blanks, then a carriage return).
    assert re.search(r"\r +\r\d\d:\d\d:\d\d calibrate: ", text), text[-3000:]
    assert "progress:" not in text
    summary = text.index("calibrate: accepted at ")
    assert "\r" + "calibrate step" not in text[summary:].split("\n", 1)[1]


def test_display_off_and_plain_rate(tmp_path: Path) -> None:
    """The display object: off shows nothing; plain shows a start at once and then at most one
    line per interval."""
    out = tmp_path / "shown.txt"
    with out.open("w") as stream:
        with ProgressDisplay("off", str, stream=stream) as display:
            display("anything")
        with ProgressDisplay("plain", lambda p: p.label, stream=stream,
                             plain_every_s=3600.0) as display:
            for label, event in (("a", "start"), ("b", "acquisition"), ("c", "estimate"),
                                 ("d", "start")):
                display(type("P", (), {"label": label, "event": event})())
    assert out.read_text() == "progress: a\nprogress: d\n"


def test_the_library_stays_free_of_display_code() -> None:
    """Only the commands (the command line, the study) and run/display.py know tqdm or the
    display; the loop, the runner and the progress data never do (DEVELOPERS.md: a functional
    core, a thin shell)."""
    import ast

    users = set()
    for path in (REPO / "autotune").rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            names = ([a.name for a in node.names] if isinstance(node, ast.Import) else
                     [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            if any(n.split(".")[0] == "tqdm" or n == "autotune.run.display" for n in names):
                users.add(path.relative_to(REPO / "autotune").as_posix())
    shells = {"cli", "bench", "cli.py", "bench.py"}
    assert "run/display.py" in users, users
    assert {u for u in users if u.split("/")[0] not in shells} == {"run/display.py"}, users


def test_the_night_summary_counts_in_the_singular_when_one() -> None:
    """The summary of a night, like its progress line, says '1 retune', not '1 retunes'."""
    text = cli_stages._track_summary({
        "status": "ended", "stop_reason": "end of the night", "setpoints": {"velocity": 516.33,
        "detuning": -32090.0}, "held": True, "left_at": "its safe set-points", "checks": 1,
        "rechecks": 0, "corrections": 4, "alarms": 0, "retunes": 1, "calibrations": 0,
        "holding_share": 0.087, "night_rig_time_s": 3600.0, "budget_fraction": 0.05})
    assert ": 1 check (0 repeated at once), 4 corrections, 0 alarms, 1 retune, 0 calibrations; " \
        in text, text
