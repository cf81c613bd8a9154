"""Tests of autotune.report: the morning report of run folders, dry runs and nights.

Real inputs come from real processes: a dry run, a calibration killed with SIGKILL against a
simulated rig subprocess, and an hour-long night of ``track`` (one module-scoped set, made once).
Constructed run folders are written with the real journal writer and real fringe estimates from
binomial counts, to make the flags fire (and stay quiet) on purpose.

Outside references: scipy.stats (Wilson interval, chi-square tail), the worked Wilson values of
docs/physics.md section 5 (scipy.stats, 7 of 50 at 95 %), chi-square tables, the PNG signature
(PNG specification, ISO/IEC 15948), and the run's own journal and result files.
"""

from __future__ import annotations

import base64
import json
import math
import re
import shutil
import signal
import subprocess
import sys
import tomllib
from html.parser import HTMLParser
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from cli_helpers import DryRun
from cli_helpers import to_toml as _to_toml
from cli_helpers import wait_for_records
from matplotlib.contour import ContourSet
from scipy import stats

from autotune import report
from autotune.report.text import header_rows as report_header
from autotune.analysis.fringe import FringeData, estimate_inversion
from autotune.run import records
from autotune.run.journal import (JOURNAL_NAME, RESULT_NAME, Journal, read_journal, read_json,
                              write_json_atomic)
from rig_process import REPO, spawn_server

DRY_RUN_CONFIG = REPO / "configs" / "dry-run.toml"
RUN_TIMEOUT_S = 600.0
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


def _autotune(*args: str, timeout: float = RUN_TIMEOUT_S) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "autotune.cli", *args], capture_output=True,
                          text=True, timeout=timeout, cwd=REPO, stdin=subprocess.DEVNULL)




def _config(path: Path, endpoint: str, store: Path, **tables: dict[str, Any]) -> Path:
    data = tomllib.loads(DRY_RUN_CONFIG.read_text())
    data["bus"]["endpoint"] = endpoint
    data["calibration"]["store"] = str(store)
    for name, values in tables.items():
        data.setdefault(name, {}).update(values)
    path.write_text(_to_toml(data))
    return path


def _wait_for_estimates(journal: Path, count: int, timeout_s: float = 300.0) -> None:
    wait_for_records(journal, "estimate", count, timeout_s)


#: The tests that read the dry run's report (dry_report, its figures drawn once per module) run
#: on one worker (pytest-xdist's loadgroup); the killed run and the night, each read by one
#: test, are built on whichever worker runs it, side by side with the others.
_SHARES_FIXTURE = pytest.mark.xdist_group("test_report")


@pytest.fixture(scope="module")
def dry_folder(readme_dry_run: DryRun) -> Path:
    """The dry run's folder: the session's one README dry run (conftest.py), read only."""
    assert readme_dry_run.returncode == 0 and readme_dry_run.folder is not None, \
        readme_dry_run.stderr[-3000:]
    return readme_dry_run.folder


@pytest.fixture(scope="module")
def killed_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A calibration killed (SIGKILL) after its fourth estimate, on a rig of its own."""
    base = tmp_path_factory.mktemp("killed")
    server = spawn_server(base, "rig", seed=11)
    try:
        config = _config(base / "c.toml", server.endpoint, base / "unused-store.json")
        killed = base / "killed"
        process = subprocess.Popen([sys.executable, "-m", "autotune.cli", "calibrate",
                                    "--config", str(config), "--out", str(killed)], cwd=REPO,
                                   stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                   stderr=subprocess.DEVNULL)
        try:
            _wait_for_estimates(killed / JOURNAL_NAME, 4)
            process.send_signal(signal.SIGKILL)
            process.wait(timeout=30)
        finally:
            if process.poll() is None:
                process.kill()
                process.wait(timeout=30)
    finally:
        server.stop()
    return killed


@pytest.fixture(scope="module")
def night_run(tmp_path_factory: pytest.TempPathFactory, dry_folder: Path) -> Path:
    """A two-cycle track folder, from the dry run's last good calibration, on a rig of its
    own (on another run's rig, its data would depend on how far that run got)."""
    base = tmp_path_factory.mktemp("night")
    store = base / "good.json"
    shutil.copy(dry_folder / "last-good.json", store)
    server = spawn_server(base, "night-rig", seed=11)
    try:
        track_config = _config(base / "t.toml", server.endpoint, store,
                               track={"max_rig_time_s": 3600.0})
        tracked = _autotune("track", "--config", str(track_config), "--out",
                            str(base / "track"))
        assert tracked.returncode == 0, tracked.stderr[-3000:]
    finally:
        server.stop()
    return base / "track"


@pytest.fixture(scope="module")
def dry_report(dry_folder: Path) -> report.Report:
    """The dry run's report, figures drawn (not saved)."""
    return report.build_report(dry_folder)


def _figure(rep: report.Report, section: str, key: str) -> Any:
    found = [f for f in rep.figures if f.section == section and f.key == key]
    assert len(found) == 1, [(f.section, f.key) for f in rep.figures]
    return found[0].figure


def _by_gid(fig: Any, gid: str) -> list[Any]:
    return fig.findobj(lambda artist: artist.get_gid() == gid)


def _labels(fig: Any) -> list[str]:
    return [text for ax in fig.axes for text in (ax.get_xlabel(), ax.get_ylabel()) if text]


def _journal_estimates(run_dir: Path) -> list[dict[str, Any]]:
    return [r for r in read_journal(run_dir / JOURNAL_NAME) if r["type"] == "estimate"]


# --------------------------------------------------------------------------------------------
# Constructed runs
# --------------------------------------------------------------------------------------------

PHASES = np.linspace(0.0, 2.0 * np.pi, 6, endpoint=False)
BOX = {"velocity": [460.0, 560.0], "detuning": [-60000.0, 60000.0]}


def _fringe_counts(rng: np.random.Generator, atoms: int, shift: float = math.pi,
                   pattern: Sequence[float] | None = None) -> dict[str, list[tuple[int, int, int]]]:
    """(e, g, i) per phase: empty P_g = 0.5 - 0.4 cos(phi), one photon shifted by ``shift``."""
    empty = 0.5 - 0.4 * np.cos(PHASES)
    one = 0.5 - 0.3 * np.cos(PHASES - shift) if pattern is None else np.asarray(pattern)
    out = {}
    for name, p in (("empty", empty), ("one_photon", one)):
        g = rng.binomial(atoms, p)
        out[name] = [(0, int(k), int(atoms - k)) for k in g]
    return out


def _write_run(path: Path, measurements: Sequence[dict[str, Any]], *, command: str = "calibrate",
               box: dict[str, list[float]] | None = BOX, end: str | None = "accepted",
               result: dict[str, Any] | None = None, extra: Sequence[tuple[str, dict]] = (),
               clock0: float = 0.0) -> Path:
    """A run folder written with the real journal writer; estimates from autotune.analysis.fringe."""
    manifest = {"run_id": path.name, "command": command, "started": "2026-01-01T00:00:00+00:00",
                "config": {"measurement": {"confidence": 0.95}}, "seed": 1, "versions": {},
                "rig": {"rig": "test-bench", "simulated": True}}
    clock = clock0
    with Journal.create(path, manifest) as journal:
        journal.append("start", clock=clock, command=command)
        if box is not None:
            journal.append("stage", stage=command, box=box, initial_points=[], budget={},
                           strategy="bayesian", seed=1)
        for spec in measurements:
            for kind, fields in spec.get("before", ()):
                if kind not in records.KINDS:
                    # A record of a later version: the writer refuses a type it does not know,
                    # so it is written as a placeholder and renamed below.
                    fields = {"what": _LATER, "reason": kind, **fields}
                    kind = "decision"
                journal.append(kind, **({"clock": clock} | fields))
            label, point, setpoints = spec["label"], spec["point"], spec["setpoints"]
            journal.append("measurement", label=label, point=point, setpoints=setpoints,
                           shots_per_phase=spec.get("shots", 1000))
            journal.append("move", setpoints=setpoints, applied=setpoints, clock=clock,
                           reason=f"{label} {point}")
            t0 = clock
            for j, phase in enumerate(PHASES):
                for fld in ("empty", "one_photon"):
                    e, g, i = spec["counts"][fld][j]
                    journal.append("acquisition", label=label, point=point, field=fld,
                                   phase_index=j, ramsey_phase=float(phase), shots=1000,
                                   counts={"e": e, "g": g, "i": i}, t_start=clock,
                                   t_end=clock + 10.0, setpoints=setpoints)
                    clock += 10.0
            data = {}
            for fld in ("empty", "one_photon"):
                arr = np.array(spec["counts"][fld])
                data[fld] = FringeData.from_counts(PHASES, arr[:, 0], arr[:, 1], arr[:, 2])
            estimate = estimate_inversion(data["empty"], data["one_photon"], resamples=200)
            journal.append("estimate", label=label, point=point, setpoints=setpoints,
                           clock_s=0.5 * (t0 + clock), estimate=estimate.to_dict())
        for kind, fields in extra:
            journal.append(kind, **fields)
        if end is not None:
            journal.append("end", status=end)
    lines = (path / JOURNAL_NAME).read_text(encoding="utf-8").splitlines()
    for n, line in enumerate(lines):
        rec = json.loads(line)
        if rec.get("what") == _LATER:
            rec["type"] = rec.pop("reason")
            del rec["what"]
            lines[n] = json.dumps(rec)
    (path / JOURNAL_NAME).write_text("".join(line + "\n" for line in lines), encoding="utf-8")
    if result is not None:
        write_json_atomic(path / RESULT_NAME, result)
    return path


#: The placeholder of a record type from a later version (see _write_run).
_LATER = "__a_later_version__"


def _point(rng: np.random.Generator, label: str, point: int, velocity: float, detuning: float,
           atoms: int = 400, **counts: Any) -> dict[str, Any]:
    return {"label": label, "point": point,
            "setpoints": {"velocity": velocity, "detuning": detuning},
            "counts": _fringe_counts(rng, atoms, **counts)}


def _kinds(run_dir: Path) -> list[str]:
    return [f.kind for f in report.run_flags(report.load_run(run_dir))]


# --------------------------------------------------------------------------------------------
# The dry run: every stage, every figure
# --------------------------------------------------------------------------------------------


@_SHARES_FIXTURE
def test_dry_run_folder_has_a_section_per_stage_and_the_truth(dry_folder: Path,
                                                              dry_report: report.Report) -> None:
    """A dry run's folder reports calibrate and retune, each with true best, true@chosen, ratio."""
    assert [r.name for r in dry_report.runs] == ["calibrate", "retune"]
    for run in dry_report.runs:
        truth = json.loads((dry_folder / run.name / RESULT_NAME).read_text())["truth"]
        row = dict(dry_report.headers[run.name])["truth (simulated)"]
        ratio = truth["inversion_at_chosen"] / truth["best_inversion"]
        assert f"true@chosen {truth['inversion_at_chosen']:.3f}" in row
        assert f"true best {truth['best_inversion']:.3f}" in row
        assert f"ratio {ratio:.3f}" in row
    keys = {(f.section, f.key) for f in dry_report.figures}
    expected = {("", "timeline")}
    for stage in ("calibrate", "retune"):
        expected |= {(stage, "fringes"), (stage, "progress"), (stage, "map"),
                     (stage, "phase-shift"), (stage, "absorption")}
        if any(r["label"] in report.SCAN_LABELS
               for r in _journal_estimates(dry_folder / stage)):
            expected.add((stage, "scan"))  # only where the stage measured lock steps or a scan
    assert keys == expected


@_SHARES_FIXTURE
def test_header_states_status_interval_level_and_setpoints(dry_folder: Path,
                                                           dry_report: report.Report) -> None:
    """The header gives the verified inversion with its interval and level, set-points to 0.1 m/s and 0.01 kHz."""
    result = json.loads((dry_folder / "calibrate" / RESULT_NAME).read_text())
    header = dict(dry_report.headers["calibrate"])
    low, high = result["inversion_interval"]
    assert header["status"] == result["status"]
    assert header["verified inversion"] == (f"{result['inversion']:.3f} [{low:.3f}, {high:.3f}] "
                                            f"({100 * result['confidence']:g} % interval)")
    sp = result["setpoints"]
    assert header["chosen set-points"] == (f"velocity {sp['velocity']:.1f} m/s, "
                                           f"detuning {sp['detuning'] / 1e3:+.2f} kHz")
    assert f"{result['shots']:,} shots" in header["effort"]
    assert header["stop reason"] == result["stop_reason"]


@_SHARES_FIXTURE
def test_fringe_figure_shows_wilson_bars_and_the_journal_fit(dry_folder: Path,
                                                             dry_report: report.Report) -> None:
    """Six phases per field with Wilson bars from the counts; the curves give the journal's inversion."""
    fig = _figure(dry_report, "calibrate", "fringes")
    assert any("(rad)" in label for label in _labels(fig))
    records = read_journal(dry_folder / "calibrate" / JOURNAL_NAME)
    verify = [r for r in records if r["type"] == "acquisition" and r["label"] == "verify"]
    for fld in ("empty", "one_photon"):
        (line,) = _by_gid(fig, f"data-{fld}")
        rows = sorted((r for r in verify if r["field"] == fld), key=lambda r: r["phase_index"])
        assert len(line.get_xdata()) == len(rows) == 6
        n = [sum(r["counts"].values()) for r in rows]
        g = [r["counts"]["g"] for r in rows]
        np.testing.assert_allclose(line.get_ydata(), np.divide(g, n))
        container = next(c for ax in fig.axes for c in ax.containers if c.lines[0] is line)
        segments = container.lines[2][0].get_segments()
        for (k, t), seg in zip(zip(g, n, strict=True), segments, strict=True):
            # Reference: scipy.stats' Wilson score interval.
            ci = stats.binomtest(k, t).proportion_ci(0.95, method="wilson")
            assert seg[0][1] == pytest.approx(ci.low) and seg[1][1] == pytest.approx(ci.high)
    (empty,) = _by_gid(fig, "fit-empty")
    (one,) = _by_gid(fig, "fit-one_photon")
    journaled = [r for r in _journal_estimates(dry_folder / "calibrate") if r["label"] == "verify"]
    # The largest one-photon minus empty difference over phase is the inversion (docs/physics.md s.5),
    # here the value the loop journaled from the same counts.
    difference = np.max(np.asarray(one.get_ydata()) - np.asarray(empty.get_ydata()))
    assert difference == pytest.approx(journaled[-1]["estimate"]["inversion"], abs=2e-3)


def test_wilson_bars_match_the_worked_values(tmp_path: Path) -> None:
    """7 of 50 at 95 %: the bar spans Wilson [0.069508, 0.261862] (docs/physics.md s.5, scipy.stats)."""
    rng = np.random.default_rng(1)
    spec = _point(rng, "verify", 0, 500.0, 0.0)
    spec["counts"]["empty"][0] = (0, 7, 43)
    run = _write_run(tmp_path / "run", [_point(rng, "point", 0, 490.0, 0.0), spec])
    fig, _ = report.figure_fringes(report.load_run(run))
    (line,) = _by_gid(fig, "data-empty")
    container = next(c for ax in fig.axes for c in ax.containers if c.lines[0] is line)
    low, high = container.lines[2][0].get_segments()[0][:, 1]
    assert low == pytest.approx(0.069508, abs=1e-6) and high == pytest.approx(0.261862, abs=1e-6)


@_SHARES_FIXTURE
def test_progress_figure_follows_the_best_so_far(dry_folder: Path,
                                                 dry_report: report.Report) -> None:
    """One step per estimate, never decreasing, ending at the largest inversion measured."""
    fig = _figure(dry_report, "calibrate", "progress")
    estimates = _journal_estimates(dry_folder / "calibrate")
    (line,) = _by_gid(fig, "best-so-far")
    best = np.asarray(line.get_ydata())
    assert len(best) == len(estimates)
    assert np.all(np.diff(best) >= 0)
    assert best[-1] == pytest.approx(max(r["estimate"]["inversion"] for r in estimates))
    shots = np.asarray(line.get_xdata())
    total = sum(r["shots"] for r in read_journal(dry_folder / "calibrate" / JOURNAL_NAME)
                if r["type"] == "acquisition")
    assert shots[-1] == total and np.all(np.diff(shots) > 0)
    assert any("(count)" in label for label in _labels(fig))


@_SHARES_FIXTURE
def test_map_figure_numbers_the_points_in_the_box(dry_folder: Path,
                                                  dry_report: report.Report) -> None:
    """Every search point drawn and numbered, the box drawn, chosen and true best marked."""
    fig = _figure(dry_report, "calibrate", "map")
    labels = _labels(fig)
    assert "velocity set-point (m/s)" in labels and "detuning set-point (kHz)" in labels
    estimates = [r for r in _journal_estimates(dry_folder / "calibrate")
                 if r["label"] in report.SEARCH_LABELS]
    drawn = []
    for label in dict.fromkeys(r["label"] for r in estimates):
        (points,) = _by_gid(fig, f"points-{label}")
        drawn += [tuple(p) for p in points.get_offsets()]
    expected = [(r["setpoints"]["velocity"], r["setpoints"]["detuning"] / 1e3) for r in estimates]
    np.testing.assert_allclose(sorted(drawn), sorted(expected))
    numbers = sorted(int(t.get_text()) for t in fig.axes[0].texts)
    assert numbers == sorted(r["point"] for r in estimates)
    (box,) = _by_gid(fig, "box")
    stage = next(r for r in read_journal(dry_folder / "calibrate" / JOURNAL_NAME)
                 if r["type"] == "stage")
    assert box.get_x() == stage["box"]["velocity"][0]
    assert box.get_width() == pytest.approx(np.ptp(stage["box"]["velocity"]))
    assert box.get_y() == pytest.approx(stage["box"]["detuning"][0] / 1e3)
    result = json.loads((dry_folder / "calibrate" / RESULT_NAME).read_text())
    (chosen,) = _by_gid(fig, "chosen")
    assert chosen.get_xdata()[0] == result["setpoints"]["velocity"]
    (true_best,) = _by_gid(fig, "true-best")
    assert true_best.get_xdata()[0] == result["truth"]["best_setpoints"]["velocity"]
    # No surface of the report's own: the lock chose from its curves, not from a surface.
    assert not any(isinstance(c, ContourSet) for c in fig.axes[0].collections)
    assert "No surface is drawn" in next(f for f in dry_report.figures
                                         if f.key == "map" and f.section == "calibrate").caption
    assert any(ax.get_label() == "<colorbar>" for ax in fig.axes)  # the colour has its scale


@_SHARES_FIXTURE
def test_scan_figure_holds_the_lock_steps(dry_folder: Path,
                                          dry_report: report.Report) -> None:
    """The phase lock's detuning steps, in kHz, with their intervals, one series per label."""
    fig = _figure(dry_report, "calibrate", "scan")
    estimates = _journal_estimates(dry_folder / "calibrate")
    for label in ("lock", "relock"):
        steps = [r for r in estimates if r["label"] == label]
        if not steps:
            continue
        (line,) = _by_gid(fig, f"scan-{label}")
        np.testing.assert_allclose(line.get_xdata(),
                                   [r["setpoints"]["detuning"] / 1e3 for r in steps])
        np.testing.assert_allclose(line.get_ydata(), [r["estimate"]["inversion"] for r in steps])
    assert "detuning set-point (kHz)" in _labels(fig)


@_SHARES_FIXTURE
def test_phase_shift_figure_is_in_units_of_pi(dry_folder: Path,
                                              dry_report: report.Report) -> None:
    """Every estimate's phase shift divided by pi, against detuning in kHz."""
    fig = _figure(dry_report, "retune", "phase-shift")
    (scatter,) = _by_gid(fig, "phase-shift")
    estimates = _journal_estimates(dry_folder / "retune")
    np.testing.assert_allclose(scatter.get_offsets(),
                               [[r["setpoints"]["detuning"] / 1e3,
                                 r["estimate"]["phase_shift"] / math.pi] for r in estimates])
    assert "photon phase shift (π rad)" in _labels(fig)


@_SHARES_FIXTURE
def test_timeline_chains_the_stages_on_the_rig_clock(dry_folder: Path,
                                                     dry_report: report.Report) -> None:
    """Inversion, detuning and corrections against rig time; the retune counts as a correction."""
    fig = _figure(dry_report, "", "timeline")
    assert len(fig.axes) == 3
    assert fig.axes[2].get_xlabel() == "rig time since the first run started (h)"
    total = sum(len(_journal_estimates(dry_folder / name)) for name in ("calibrate", "retune"))
    drawn = sum(len(line.get_xdata()) for line in fig.findobj(
        lambda a: str(a.get_gid()).startswith("inv-")))
    assert drawn == total
    (retunes,) = _by_gid(fig, "retunes")
    retune = json.loads((dry_folder / "retune" / RESULT_NAME).read_text())
    check = [r for r in _journal_estimates(dry_folder / "retune") if r["label"] == "check"][0]
    assert retunes.get_ydata()[0] == pytest.approx(
        (retune["setpoints"]["detuning"] - check["setpoints"]["detuning"]) / 1e3)


@_SHARES_FIXTURE
def test_every_figure_has_units_on_its_axes(dry_report: report.Report) -> None:
    """Each drawn axis label names its unit in parentheses."""
    for fig in dry_report.figures:
        labels = _labels(fig.figure)
        assert labels, fig.key
        for label in labels:
            assert re.search(r"\(.+\)$", label), (fig.key, label)


# --------------------------------------------------------------------------------------------
# The command line on real folders
# --------------------------------------------------------------------------------------------


@_SHARES_FIXTURE
def test_report_of_a_dry_run_writes_a_self_contained_page(dry_folder: Path,
                                                          dry_report: report.Report,
                                                          tmp_path: Path) -> None:
    """report DRY --out DIR: one data URI per figure file, no script, no network reference
    (one PNG per figure of the module's report of the same folder, drawn once)."""
    out = tmp_path / "out"
    done = _autotune("report", str(dry_folder), "--out", str(out))
    assert done.returncode == 0, done.stderr[-3000:]
    assert "look at this" in done.stdout and "calibrate" in done.stdout
    assert "retune" in done.stdout
    pngs = sorted(out.glob("report-*.png"))
    assert len(pngs) == len(dry_report.figures)
    page = (out / report.HTML_NAME).read_text(encoding="utf-8")
    uris = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
    assert len(uris) == len(pngs)
    assert sorted(base64.b64decode(u) for u in uris) == sorted(p.read_bytes() for p in pngs)
    assert all(p.read_bytes()[:8] == PNG_SIGNATURE for p in pngs)
    assert (out / report.FIGURE_NAME).read_bytes()[:8] == PNG_SIGNATURE
    lowered = page.lower()
    assert "<script" not in lowered and "<link" not in lowered and "@import" not in lowered
    assert "http://" not in lowered and "https://" not in lowered and "url(" not in lowered
    assert not list(dry_folder.glob("report*"))  # --out: nothing written beside the runs


def test_no_plot_prints_text_and_writes_nothing(dry_folder: Path) -> None:
    """--no-plot: the summary on stdout, no file added to the folder."""
    before = sorted(p.name for p in dry_folder.rglob("*"))
    done = _autotune("report", str(dry_folder / "calibrate"), "--no-plot")
    assert done.returncode == 0, done.stderr[-3000:]
    assert "verified inversion" in done.stdout
    estimates = _journal_estimates(dry_folder / "calibrate")
    assert done.stdout.count("\npoint ") == sum(r["label"] == "point" for r in estimates)
    assert sorted(p.name for p in dry_folder.rglob("*")) == before


def test_report_of_a_killed_run(killed_run: Path, tmp_path: Path) -> None:
    """A SIGKILLed calibration, and the same with a last line cut mid-write: reported, flagged."""
    cut = tmp_path / "cut"
    shutil.copytree(killed_run, cut)
    with (cut / JOURNAL_NAME).open("ab") as handle:
        handle.write(b'{"seq": 999, "type": "acquisition", "label": "po')
    for folder in (killed_run, cut):
        assert not (folder / RESULT_NAME).exists()
        done = _autotune("report", str(folder))
        assert done.returncode == 0, done.stderr[-3000:]
        assert "running or killed" in done.stdout
        assert "the run did not end" in done.stdout
        assert "--resume" in done.stdout
        assert (folder / report.HTML_NAME).exists()
    assert "a write cut by a kill" in _autotune("report", str(cut), "--no-plot").stdout
    run = report.load_run(cut)
    assert run.cut_line and run.status == "running or killed"
    built = report.build_report(cut)
    keys = {f.key for f in built.figures}
    assert {"fringes", "progress", "map", "phase-shift"} <= keys
    # Without chosen set-points, the fringe figure shows the latest measurement.
    fig = next(f for f in built.figures if f.key == "fringes")
    assert "latest measurement" in fig.caption


def test_report_of_a_night_draws_its_timeline(night_run: Path) -> None:
    """A night of track (one run folder): the night figure against rig time with every check,
    and the corrections drawn from the night's 'correct' decisions (from/to set-points)."""
    done = _autotune("report", str(night_run))
    assert done.returncode == 0, done.stderr[-3000:]
    page = (night_run / report.HTML_NAME).read_text(encoding="utf-8")
    assert 'id="fig-run-night"' in page
    assert (night_run / "report-night.png").read_bytes()[:8] == PNG_SIGNATURE
    built = report.build_report(night_run)
    assert [f.key for f in built.figures] == ["night", "fringes"]  # no map, no running maximum
    fig = _figure(built, "", "night")
    drawn = sum(len(line.get_xdata()) for line in fig.findobj(
        lambda a: a.get_gid() in ("night-checks", "night-stage-points")))
    assert drawn == len(_journal_estimates(night_run))
    records = read_journal(night_run / JOURNAL_NAME)
    corrections = [r for r in records if r["type"] == "decision" and r["what"] == "correct"]
    drawn = fig.findobj(lambda a: a.get_gid() == "corrections")
    assert corrections and sum(len(line.get_xdata()) for line in drawn) == len(corrections)
    # The bars are the intervals the text prints (the run's confidence, within [0, 1]).
    ax_inv = fig.axes[0]
    tops = [seg[:, 1].max() for coll in ax_inv.collections
            if hasattr(coll, "get_segments") for seg in coll.get_segments() if len(seg)]
    assert tops and max(tops) <= 1.0 + 1e-12
    # The header reads as a night: what it held, its counts and beam share, its last check
    # (a check, not a verification), the numbers of its result.json.
    result = read_json(night_run / RESULT_NAME)
    rows = dict(report_header(built.runs[0]))
    assert "verified inversion" not in rows and "best measured" not in rows
    assert rows["stop reason"] == result["stop_reason"]
    assert rows["beam on holding"].startswith(f"{result['holding_share']:.1%} of the night")
    assert f"{result['checks']} checks" in rows["night"] or result["checks"] == 1
    holds = [r for r in records if r["type"] == "estimate" and r["label"] == "hold"]
    assert rows["last check"].startswith(f"{holds[-1]['estimate']['inversion']:.3f} [")
    assert "journal record types not drawn" not in done.stdout


@pytest.mark.parametrize("damage", ["empty", "missing", "no_manifest", "bad_result"])
def test_a_folder_that_is_not_a_run_exits_2_naming_the_path(dry_folder: Path,
                                                            tmp_path: Path, damage: str) -> None:
    """Missing or damaged files: exit code 2 and a message naming the offending path."""
    folder = tmp_path / "run"
    if damage == "empty":
        folder.mkdir()
        named = str(folder)
    elif damage == "missing":
        named = str(folder)
    else:
        shutil.copytree(dry_folder / "retune", folder)
        if damage == "no_manifest":
            (folder / "manifest.json").unlink()
            named = str(folder / "manifest.json")
        else:
            (folder / RESULT_NAME).write_text("{truncated")
            named = str(folder / RESULT_NAME)
    done = _autotune("report", str(folder))
    assert done.returncode == 2, (done.stdout, done.stderr)
    assert named in done.stderr


def test_a_journal_with_a_damaged_line_is_reported_up_to_it(dry_folder: Path,
                                                           tmp_path: Path) -> None:
    """A line that is not JSON in the middle of a journal: exit code 0, the records before it
    reported, and a note naming the journal, the line and what was found there."""
    folder = tmp_path / "run"
    shutil.copytree(dry_folder / "retune", folder)
    lines = (folder / JOURNAL_NAME).read_text().splitlines(keepends=True)
    lines[3] = "this is not JSON\n"
    (folder / JOURNAL_NAME).write_text("".join(lines))
    done = _autotune("report", str(folder), "--no-plot")
    assert done.returncode == 0, (done.stdout, done.stderr)
    assert (f"NOTE: {folder / JOURNAL_NAME} line 4: expected record seq 3, found text that is "
            f"not JSON: this is not JSON") in done.stdout
    assert "shows the 3 records before it" in done.stdout


# --------------------------------------------------------------------------------------------
# Flags on constructed runs
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("at_edge", "fires"), [(2, False), (3, True)])
def test_points_piled_at_an_edge_are_flagged(tmp_path: Path, at_edge: int, fires: bool) -> None:
    """More than a third of 6 search points within 2 % of an edge fires; exactly a third does not."""
    rng = np.random.default_rng(2)
    points = [_point(rng, "point", k, 559.0 if k < at_edge else 470.0 + 10 * k, -5000.0 * k)
              for k in range(6)]
    run = _write_run(tmp_path / "run", points, end=None)
    flags = report.run_flags(report.load_run(run))
    piled = [f for f in flags if f.kind == "edge_pile"]
    assert bool(piled) is fires
    if fires:
        assert "3 of 6" in piled[0].text and "upper velocity edge" in piled[0].text


def test_a_recommendation_at_an_edge_is_flagged(tmp_path: Path) -> None:
    """Chosen set-points within 2 % of the detuning box's lower edge fire the flag."""
    rng = np.random.default_rng(3)
    chosen = {"velocity": 510.0, "detuning": -59000.0}
    run = _write_run(tmp_path / "run", [_point(rng, "point", 0, 500.0, 0.0),
                                         _point(rng, "verify", 0, **chosen)],
                     result={"setpoints": chosen, "status": "accepted"})
    flags = [f for f in report.run_flags(report.load_run(run)) if f.kind == "edge_choice"]
    assert len(flags) == 1 and "lower edge" in flags[0].text and "detuning" in flags[0].text


@pytest.mark.parametrize(("shift_pi", "atoms", "fires"),
                         [(0.70, 400, True), (1.00, 400, False), (1.06, 200000, False)])
def test_a_phase_shift_far_from_pi_is_flagged(tmp_path: Path, shift_pi: float, atoms: int,
                                              fires: bool) -> None:
    """Fires beyond both 3 s.e. and 0.1 pi; 1.06 pi measured to a tiny error does not fire."""
    rng = np.random.default_rng(4)
    chosen = {"velocity": 510.0, "detuning": 1000.0}
    run = _write_run(tmp_path / "run", [_point(rng, "point", 0, 500.0, 0.0),
                                         _point(rng, "verify", 0, **chosen, atoms=atoms,
                                                shift=shift_pi * math.pi)],
                     result={"setpoints": chosen, "status": "accepted"})
    loaded = report.load_run(run)
    final = loaded.final_measurement()
    assert final is not None and final.label == "verify"
    if shift_pi == 1.06:
        # The construction puts the case where it belongs: many standard errors, under 0.1 pi.
        off = abs(final.value("phase_shift") - math.pi)
        assert off > 3 * final.value("phase_shift_stderr") and off < 0.1 * math.pi
    assert ("phase_shift" in [f.kind for f in report.run_flags(loaded)]) is fires


def test_a_poor_fringe_fit_is_flagged_with_its_p_value(tmp_path: Path) -> None:
    """A one-photon 'fringe' that is not a sinusoid gives p < 0.001; a clean one does not."""
    rng = np.random.default_rng(5)
    zigzag = [0.2, 0.8, 0.2, 0.8, 0.2, 0.8]  # all in the third harmonic: no a + b cos + c sin fits
    run = _write_run(tmp_path / "run", [_point(rng, "point", 0, 500.0, 0.0),
                                         _point(rng, "point", 1, 510.0, 0.0, pattern=zigzag)],
                     end=None)
    flags = [f for f in report.run_flags(report.load_run(run)) if f.kind == "poor_fit"]
    assert len(flags) == 1 and "point #1 (one photon)" in flags[0].text
    assert re.search(r"p = \d\.\de-\d+", flags[0].text)


def test_fit_p_value_is_the_chi_square_tail() -> None:
    """chi2 = 16.27 with 3 dof is the 0.001 point (chi-square tables, from memory)."""
    assert report.fit_p_value(16.27, 3) == pytest.approx(0.001, rel=0.01)
    assert math.isnan(report.fit_p_value(1.0, 0))
    # Reference: scipy.stats.chi2.sf, over small and large statistics and degrees.
    import scipy.stats
    for chi2, dof in ((0.0, 1), (0.3, 1), (3.84, 1), (16.27, 3), (40.0, 8), (250.0, 12)):
        assert report.fit_p_value(chi2, dof) == pytest.approx(float(scipy.stats.chi2.sf(chi2, dof)), rel=1e-12, abs=1e-300)


def test_a_clean_finished_run_raises_no_flag(tmp_path: Path) -> None:
    """Interior points, a verified choice at pi, good fits, an end record: nothing flagged."""
    rng = np.random.default_rng(6)
    chosen = {"velocity": 505.0, "detuning": 2000.0}
    points = [_point(rng, "point", k, 480.0 + 10 * k, -20000.0 + 9000.0 * k) for k in range(6)]
    run = _write_run(tmp_path / "run", [*points, _point(rng, "verify", 0, **chosen)],
                     result={"setpoints": chosen, "status": "accepted"})
    assert _kinds(run) == []
    text = report.format_text(report.build_report(run, draw=False))
    assert "look at this: nothing flagged" in text


def test_bad_endings_and_alarms_are_flagged(tmp_path: Path) -> None:
    """An aborted run names its abort reason; a failed return to safe and an alarm are listed."""
    rng = np.random.default_rng(7)
    run = _write_run(tmp_path / "run", [_point(rng, "point", 0, 500.0, 0.0)], end="aborted",
                     extra=[("decision", {"what": "abort", "reason": "rig timeout after 3 tries"}),
                            ("safe_failed", {"reason": "aborted", "error": "no reply"}),
                            ("decision", {"what": "alarm", "reason": "contrast collapsed"})])
    flags = report.run_flags(report.load_run(run))
    assert [f.kind for f in flags] == ["ended_badly", "safe_failed", "alarm"]
    assert "rig timeout after 3 tries" in flags[0].text
    assert "contrast collapsed" in flags[2].text


def test_a_running_run_shows_the_setpoints_it_is_verifying(tmp_path: Path) -> None:
    """Before its result, a run's chosen set-points are those of the verification it started."""
    rng = np.random.default_rng(10)
    run = _write_run(tmp_path / "run", [_point(rng, "point", k, 480.0 + 10 * k, 0.0)
                                         for k in range(3)], end=None)
    target = {"velocity": 495.0, "detuning": -2500.0}
    journal, _, _ = Journal.open_for_resume(run)
    with journal:
        journal.append("decision", what="recommend", reason="surrogate's best",
                       setpoints={"velocity": 495.0, "detuning": 0.0})
        journal.append("measurement", label="verify", point=0, setpoints=target,
                       shots_per_phase=4000)
    built = report.build_report(run)
    header = dict(built.headers["run"])
    assert header["status"] == "running or killed"
    assert header["chosen set-points"] == "velocity 495.0 m/s, detuning -2.50 kHz (not yet verified)"
    assert header["verified inversion"] == "none yet"
    fringes = next(f for f in built.figures if f.key == "fringes")
    assert "latest measurement" in fringes.caption and "point #2" in fringes.caption


# --------------------------------------------------------------------------------------------
# What to know first, on the page: a damaged journal, a run still going
# --------------------------------------------------------------------------------------------


class _Sections(HTMLParser):
    """The page's top-level ``<section id=...>`` in order, each with its text."""

    def __init__(self) -> None:
        super().__init__()
        self.order: list[str] = []
        self.text: dict[str, str] = {}
        self._open: list[str | None] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "section":
            section = dict(attrs).get("id")
            if section and not any(self._open):
                self.order.append(section)
                self.text[section] = ""
            self._open.append(section)

    def handle_endtag(self, tag: str) -> None:
        if tag == "section" and self._open:
            self._open.pop()

    def handle_data(self, data: str) -> None:
        for section in self._open:
            if section:
                self.text[section] += data


def _page_sections(page: Path) -> _Sections:
    parsed = _Sections()
    parsed.feed(page.read_text(encoding="utf-8"))
    return parsed


def test_a_damaged_journal_is_told_at_the_top_of_the_page(tmp_path: Path) -> None:
    """``autotune report RUN`` on a journal whose 10th line the test overwrote: the page opens
    with a notice, above the flags, naming the line, the record expected there (9, the records
    before it, counted by the test), what was found, and that the page stops before it."""
    rng = np.random.default_rng(12)
    run = _write_run(tmp_path / "run", [_point(rng, "point", k, 480.0 + 10 * k, 0.0)
                                         for k in range(3)])
    lines = (run / JOURNAL_NAME).read_text().splitlines(keepends=True)
    lines[9] = "this is not JSON\n"
    (run / JOURNAL_NAME).write_text("".join(lines))
    done = _autotune("report", str(run))
    assert done.returncode == 0, done.stderr[-3000:]
    assert f"NOTE: {run / JOURNAL_NAME} line 10: expected record seq 9" in done.stdout
    page = _page_sections(run / report.HTML_NAME)
    assert page.order[:2] == ["notices", "flags"]
    notice = " ".join(page.text["notices"].split())
    assert "Read this first" in notice and "A damaged journal" in notice
    assert f"The journal {run / JOURNAL_NAME} is damaged at line 10" in notice
    assert "record number 9 was expected there" in notice
    assert "text that is not JSON: this is not JSON" in notice
    assert "shows the 9 records before that line and nothing after it" in notice
    assert 'href="#notices"' in (run / report.HTML_NAME).read_text(encoding="utf-8")
    # The records after the damage hold the run's end: it is not called running, nor resumable.
    flags = " ".join(page.text["flags"].split())
    assert "the journal is damaged at line 10" in flags and "cannot be resumed" in flags
    assert "--resume" not in flags and "did not end" not in flags
    assert "journal damaged" in page.text[f"run-{run.name}"]


_HOLD = """
import sys
from pathlib import Path
from autotune.run.runlock import RunLock
locks = [RunLock.acquire(Path(folder), "dry-run") for folder in sys.argv[1:]]
print("held", flush=True)
sys.stdin.read()
for lock in locks:
    lock.release()
"""


def test_a_run_still_going_is_told_at_the_top_of_the_page(tmp_path: Path) -> None:
    """A run folder whose lock another live process holds (a real process, as a running
    calibration holds it): the page opens with a notice naming that process by the id the
    operating system gave it, and saying the page shows only what was written so far; once
    the process has let go, a new page has no notice at all."""
    rng = np.random.default_rng(13)
    run = _write_run(tmp_path / "run", [_point(rng, "point", k, 480.0 + 10 * k, 0.0)
                                         for k in range(2)], end=None)
    records = len(read_journal(run / JOURNAL_NAME))
    holder = subprocess.Popen([sys.executable, "-c", _HOLD, str(run)], cwd=REPO, text=True,
                              stdin=subprocess.PIPE, stdout=subprocess.PIPE)
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        done = _autotune("report", str(run))
        assert done.returncode == 0, done.stderr[-3000:]
        assert "NOTE: " in done.stdout and f"process {holder.pid}" in done.stdout
        page = _page_sections(run / report.HTML_NAME)
        assert page.order[:2] == ["notices", "flags"]
        notice = " ".join(page.text["notices"].split())
        assert "This run was still going" in notice
        assert f"by process {holder.pid} of " in notice
        assert f"shows only the {records} journal records written so far" in notice
        assert "Make the report again once the run has ended" in notice
    finally:
        holder.communicate("", timeout=30)
    done = _autotune("report", str(run))
    assert done.returncode == 0, done.stderr[-3000:]
    assert "NOTE:" not in done.stdout
    page = _page_sections(run / report.HTML_NAME)
    assert "notices" not in page.order and page.order[0] == "flags"
    assert "Read this first" not in (run / report.HTML_NAME).read_text(encoding="utf-8")


def test_one_process_holding_a_folder_and_its_run_is_told_once(tmp_path: Path) -> None:
    """A dry run holds its output folder and the stage it is in: a report of the folder tells
    that one process (its pid from the operating system) once, at the stage's folder."""
    rng = np.random.default_rng(14)
    folder = tmp_path / "dry"
    run = _write_run(folder / "calibrate", [_point(rng, "point", 0, 500.0, 0.0)], end=None)
    holder = subprocess.Popen([sys.executable, "-c", _HOLD, str(folder), str(run)], cwd=REPO,
                              text=True, stdin=subprocess.PIPE, stdout=subprocess.PIPE)
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        built = report.build_report(folder, draw=False)
    finally:
        holder.communicate("", timeout=30)
    assert [n.kind for n in built.notices] == ["running"]
    assert f"The run in {run} was still being written" in built.notices[0].page
    assert f"process {holder.pid} of " in built.notices[0].page
    html_page = report.render_html(built)
    assert html_page.count("This run was still going") == 1


# --------------------------------------------------------------------------------------------
# A night in one journal, with record types and labels this report does not know
# --------------------------------------------------------------------------------------------


def test_a_single_track_journal_with_new_records_draws_the_night(tmp_path: Path) -> None:
    """Unknown record types and labels are skipped; a night is drawn as a night (its points,
    moves and sized corrections; no map, no scan), and its alarm-like decisions are flagged."""
    rng = np.random.default_rng(8)
    measurements = [_point(rng, "verify", 0, 505.0, 0.0)]
    for k in range(5):
        detuning = -3000.0 + 1500.0 * k
        spec = _point(rng, "lock", k, 505.0, detuning, shift=math.pi * (1 + detuning / 40e3))
        spec["before"] = [("lock_state", {"state": "holding", "k": k})]
        measurements.append(spec)
    measurements.append(_point(rng, "velocity", 0, 515.0, 3000.0))  # a label unknown here
    corrections = [("decision", {"what": "correct", "reason": "phase drifted",
                                 "from": {"velocity": 505.0, "detuning": 0.0},
                                 "to": {"velocity": 505.0, "detuning": 3000.0}}),
                   ("decision", {"what": "correct", "reason": "relock"}),
                   ("decision", {"what": "rig_mismatch", "reason": "describe changed"}),
                   ("decision", {"what": "adopt", "reason": "retune 1 was not accepted but"})]
    run = _write_run(tmp_path / "night", measurements, command="track", box=None, end=None,
                     extra=corrections)
    built = report.build_report(run)
    assert [f.key for f in built.figures] == ["night", "fringes"]
    night = _figure(built, "", "night")
    (sized,) = _by_gid(night, "corrections")
    assert list(sized.get_ydata()) == [3.0]
    (points,) = _by_gid(night, "night-stage-points")
    assert len(points.get_xdata()) == 7
    text = report.format_text(built)
    assert "lock_state (5)" in text
    assert "rig_mismatch: describe changed" in text
    assert "adopt: retune 1 was not accepted but" in text
    assert "the run did not end" in text


def test_a_rig_restart_between_runs_puts_the_night_on_wall_time(tmp_path: Path) -> None:
    """When the rig clock starts again in a later run, the time axis is wall time, and says so."""
    rng = np.random.default_rng(9)
    folder = tmp_path / "night"
    _write_run(folder / "cycle-0000", [_point(rng, "check", 0, 500.0, 0.0)], command="retune",
               clock0=5000.0)
    _write_run(folder / "cycle-0001", [_point(rng, "check", 0, 500.0, 0.0)], command="retune",
               clock0=0.0)
    night = _figure(report.build_report(folder), "", "night")
    assert night.axes[2].get_xlabel() == "wall time since the first run started (h)"
