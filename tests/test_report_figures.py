"""Tests of the report's decision figures against the journal's own numbers.

Real inputs: a dry run (``autotune dry-run``, a real process) and three nights of ``track`` on
the simulated rig in process (autotune.run.track through LocalRig, the real protocol without a
socket): a thermal step found and recovered; a step as wide as the whole detuning range, so
that no set-point within the limits brings the mode back (a night that holds, then an alarm and
a failed recovery); and an acceptance bar no stage reaches (a night that never holds).

Outside references: the journal's own records (the lock's fitted curve and covariance, the
absorption fit, the hold records' statistics and thresholds, the result's beam time), the
phase-curve and quadratic formulas written out here from autotune.analysis.guided's documented state
(not imported from the report), and the standard normal's 95 % point (scipy.stats.norm).
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import stats

from autotune import report
from autotune.report.text import header_rows as report_header
from autotune.bench import night_rig as bench_night_rig
from autotune.run import runner
from autotune.run import track
from autotune.config import load_config
from autotune.run.journal import JOURNAL_NAME, RESULT_NAME, read_journal, read_json
from autotune.kit.server import LocalRig
from drivers_sim.config import load_sim_config
from drivers_sim.driver import SimulatedDriver
from drivers_sim.rig import SimulatedRig
from cli_helpers import DryRun
from rig_process import REPO

DRY_RUN = REPO / "configs" / "dry-run.toml"
SIM = REPO / "configs" / "sim-rig.toml"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


def _night_config(hours: float, **track_changes: Any) -> Any:
    config = load_config(DRY_RUN)
    return dataclasses.replace(
        config, measurement=dataclasses.replace(config.measurement, resamples=300),
        track=dataclasses.replace(config.track, max_rig_time_s=hours * 3600.0, **track_changes))


def _rig(seed: int) -> LocalRig:
    return LocalRig(SimulatedDriver(SimulatedRig(load_sim_config(SIM), seed)))


#: The tests of this module share an expensive module-scoped fixture: one worker runs them
#: all (pytest-xdist's loadgroup), so that it is built once.
pytestmark = pytest.mark.xdist_group("test_report_figures")


@pytest.fixture(scope="module")
def folders(tmp_path_factory: pytest.TempPathFactory, readme_dry_run: DryRun) -> dict[str, Path]:
    """A dry run, a night with a recovered thermal step, a night whose recovery fails, and a
    night that never holds."""
    base = tmp_path_factory.mktemp("figures")
    # The session's one README dry run (conftest.py): read only.
    assert readme_dry_run.returncode == 0 and readme_dry_run.folder is not None, \
        readme_dry_run.stderr[-3000:]
    out = {"dry": readme_dry_run.folder}
    # The failed night's step moves the mode by the whole width of the detuning limits: the
    # set-point that would bring the atoms back into resonance lies beyond a limit, so the night
    # holds at its default bar until the step and then no recovery can reach that bar.
    detuning = {s.name: s for s in load_config(DRY_RUN).setpoints}["detuning"]
    out_of_reach_hz = detuning.limit_max - detuning.limit_min
    # A two-hour night at the default 5 % has a 6 min beam ceiling, less than a recovery: a
    # fifth lets the shifted nights pay for the recoveries these figures draw.
    for name, seed, shift_hz, changes, bar in (("recovered", 23, 15e3,
                                                {"budget_fraction": 0.2}, None),
                                               ("failed", 23, out_of_reach_hz,
                                                {"max_consecutive_failures": 1,
                                                 "budget_fraction": 0.2}, None),
                                               ("never", 9, None,
                                                {"max_consecutive_failures": 2}, 0.99)):
        rig = _rig(seed)
        config = _night_config(2.0 if shift_hz else 6.0, **changes)
        store = base / f"{name}-good.json"
        runner.calibrate(rig, config, base / f"{name}-calibrate", store=store)
        if bar is not None:
            config = dataclasses.replace(config, min_inversion=bar, search=dataclasses.replace(
                config.search, max_points=6))
        steps = [(rig.sim.clock + 3000.0, shift_hz)] if shift_hz else []
        track.track(bench_night_rig._NightRig(rig, steps, 60.0), config, base / name, store=store)
        out[name] = base / name
    return out


@pytest.fixture(scope="module")
def reports(folders: dict[str, Path]) -> Any:
    """``reports(folder)``: the report of one of the module's folders, its figures drawn once
    for every test that reads them (drawing the dry run's takes seconds of CPU; six tests read
    it). The tests only read the figures."""
    built: dict[Path, report.Report] = {}

    def get(folder: Path) -> report.Report:
        if folder not in built:
            built[folder] = report.build_report(folder)
        return built[folder]

    return get


def _figure(built: report.Report, section: str, key: str) -> Any:
    found = [f for f in built.figures if f.section == section and f.key == key]
    assert len(found) == 1, [(f.section, f.key) for f in built.figures]
    return found[0]


def _by_gid(fig: Any, gid: str) -> list[Any]:
    return fig.findobj(lambda artist: artist.get_gid() == gid)


def _decisions(run_dir: Path, what: str) -> list[dict[str, Any]]:
    return [r for r in read_journal(run_dir / JOURNAL_NAME)
            if r["type"] == "decision" and r["what"] == what]


def _estimates(run_dir: Path) -> list[dict[str, Any]]:
    return [r for r in read_journal(run_dir / JOURNAL_NAME) if r["type"] == "estimate"]


# --------------------------------------------------------------------------------------------
# A calibration and a retune: why this detuning, why this velocity
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("stage", ["calibrate", "retune"])
def test_phase_figure_draws_the_lock_model_that_chose_the_detuning(folders, reports, stage):
    """The green curve is alpha + s d + c (d/h)^3 + beta tau from the journaled lock_fit at the
    verification's clock; it crosses the journaled phase at the peak at the chosen detuning."""
    run_dir = folders["dry"] / stage
    built = reports(folders["dry"])
    fig = _figure(built, stage, "phase-shift").figure
    learned = _decisions(run_dir, "stop_search")[-1]["learned"]
    fit = learned["lock_fit"]
    verify = [r for r in _estimates(run_dir) if r["label"] == "verify"][-1]
    (line,) = _by_gid(fig, "lock-model")
    d = np.asarray(line.get_xdata()) * 1e3 - fit["centre_hz"]
    tau = verify["clock_s"] - fit["t_ref_s"]
    alpha, s, c, beta = fit["coefficients"]
    expected = alpha + s * d + c * (d / fit["step_hz"]) ** 3 + beta * tau
    np.testing.assert_allclose(np.asarray(line.get_ydata()) * math.pi, expected, rtol=1e-9)
    (star,) = _by_gid(fig, "phase-at-peak")
    assert star.get_ydata()[0] == pytest.approx(learned["phase_at_peak_rad"] / math.pi)
    result = read_json(run_dir / RESULT_NAME)
    (chosen,) = _by_gid(fig, "chosen-detuning")
    assert chosen.get_xdata()[0] == pytest.approx(result["setpoints"]["detuning"] / 1e3)
    # The model at the chosen detuning reads the phase at the peak: that is why it was chosen
    # (the recommendation aims at the middle of the verification, whose clock_s is its mid-time).
    at = np.interp(result["setpoints"]["detuning"] / 1e3, line.get_xdata(), line.get_ydata())
    assert at == pytest.approx(learned["phase_at_peak_rad"] / math.pi, abs=0.02)
    # The 95 % band is the curve +- 1.96 standard errors of the journaled covariance.
    (band,) = _by_gid(fig, "lock-band")
    x = np.stack([np.ones_like(d), d, (d / fit["step_hz"]) ** 3, np.full_like(d, tau)], axis=1)
    sd = np.sqrt(np.einsum("ij,jk,ik->i", x, np.asarray(fit["covariance"]), x))
    z = stats.norm.ppf(0.975)
    top = band.get_paths()[0].vertices[:, 1].max()
    assert top == pytest.approx(((expected + z * sd) / math.pi).max(), rel=1e-6)
    # The numbers printed on it are the journal's.
    legend = [text.get_text() for ax in fig.axes if ax.get_legend()
              for text in ax.get_legend().get_texts()]
    assert f"chosen detuning {result['setpoints']['detuning'] / 1e3:+.2f} kHz" in legend
    star_sd = learned["phase_at_peak_stderr_rad"]
    assert (f"phase at the peak {learned['phase_at_peak_rad'] / math.pi:.3f} π ± "
            f"{z * star_sd / math.pi:.3f} π") in legend
    # Every estimate is drawn, unwrapped around the phase at the peak.
    (points,) = _by_gid(fig, "phase-shift")
    assert len(points.get_offsets()) == len(_estimates(run_dir))


@pytest.mark.parametrize("stage", ["calibrate", "retune"])
def test_absorption_figure_draws_the_lock_quadratic_and_the_chosen_velocity(folders, reports,
                                                                           stage):
    """Points are the journal's absorptions; the curve is a0 + a1 x + a2 x^2 in x = v_ref/v - 1
    from the journaled fit; the least-absorption and chosen velocities are the journal's."""
    run_dir = folders["dry"] / stage
    built = reports(folders["dry"])
    item = _figure(built, stage, "absorption")
    fig = item.figure
    learned = _decisions(run_dir, "stop_search")[-1]["learned"]
    fit = learned["absorption_fit"]
    (curve,) = _by_gid(fig, "absorption-model")
    x = fit["velocity_ref_m_per_s"] / np.asarray(curve.get_xdata()) - 1.0
    a0, a1, a2 = fit["coefficients"]
    np.testing.assert_allclose(curve.get_ydata(), a0 + a1 * x + a2 * x * x, rtol=1e-9)
    drawn = sorted((v, p) for line in fig.findobj(lambda a: str(a.get_gid()).startswith("absorption-")
                                                  and hasattr(a, "get_xdata")
                                                  and a.get_gid() != "absorption-model")
                   for v, p in zip(line.get_xdata(), line.get_ydata(), strict=True))
    journal = sorted((r["setpoints"]["velocity"], r["estimate"]["absorption"])
                     for r in _estimates(run_dir))
    np.testing.assert_allclose(drawn, journal)
    (least,) = _by_gid(fig, "least-absorption")
    assert least.get_xdata()[0] == pytest.approx(learned["velocity_least_absorption_m_per_s"])
    result = read_json(run_dir / RESULT_NAME)
    chosen = _by_gid(fig, "chosen-velocity")
    assert chosen and all(c.get_xdata()[0] == pytest.approx(result["setpoints"]["velocity"])
                          for c in chosen)
    sd = learned["velocity_least_absorption_stderr_m_per_s"]
    assert f"{stats.norm.ppf(0.975) * sd:.1f} m/s (95 %)" in item.caption
    legend = [text.get_text() for legend in fig.legends for text in legend.get_texts()]
    assert f"chosen velocity {result['setpoints']['velocity']:.1f} m/s" in legend
    assert (f"least absorption {learned['velocity_least_absorption_m_per_s']:.1f} m/s ± "
            f"{stats.norm.ppf(0.975) * sd:.1f} m/s (95 %)") in legend


def test_the_dry_run_timeline_marks_the_thermal_step_where_it_happened(folders, reports):
    """The thermal step recorded in the retune's manifest is drawn at its rig clock, and the
    retune's correction where the retune first moved, not at the run's end."""
    built = reports(folders["dry"])
    fig = _figure(built, "", "timeline").figure
    manifest = json.loads((folders["dry"] / "retune" / "manifest.json").read_text())
    step = manifest["dry_run"]["thermal_step"]
    assert step["shift_hz"] == 15e3
    lines = _by_gid(fig, "thermal-step")
    assert len(lines) == 3 and all(line.get_xdata()[0] == pytest.approx(step["clock"] / 3600.0)
                                   for line in lines)  # the calibration began at clock 0
    (retune,) = _by_gid(fig, "retunes")
    check = [r for r in _estimates(folders["dry"] / "retune") if r["label"] == "check"][0]
    moves = [r for r in read_journal(folders["dry"] / "retune" / JOURNAL_NAME)
             if r["type"] == "move" and r["clock"] > check["clock_s"]]
    assert retune.get_xdata()[0] == pytest.approx(moves[0]["clock"] / 3600.0)


# --------------------------------------------------------------------------------------------
# Nights
# --------------------------------------------------------------------------------------------


def _holds(run_dir: Path) -> list[dict[str, Any]]:
    return [r for r in read_journal(run_dir / JOURNAL_NAME) if r["type"] == "hold"]


@pytest.mark.parametrize("name", ["recovered", "failed"])
def test_the_night_draws_each_statistic_against_its_threshold(folders, reports, name):
    """S+, S- and the inversion's S are the hold records' numbers at the checks' clocks; the
    thresholds are the plan's; each alarm is marked at its journaled value."""
    run_dir = folders[name]
    built = reports(run_dir)
    assert [f.key for f in built.figures] == ["night", "fringes"]
    fig = _figure(built, "", "night").figure
    holds = _holds(run_dir)
    start = read_journal(run_dir / JOURNAL_NAME)[0]["clock"]
    for key in ("upper", "lower", "inversion"):
        (line,) = _by_gid(fig, f"stat-{key}")
        np.testing.assert_allclose(line.get_ydata(), [h["numbers"][key] for h in holds])
        np.testing.assert_allclose(line.get_xdata(),
                                   [(h["clock_s"] - start) / 3600.0 for h in holds])
    (threshold,) = _by_gid(fig, "threshold")
    np.testing.assert_allclose(threshold.get_ydata(),
                               [h["state"]["plan"]["test"]["threshold"] for h in holds])
    alarms = _decisions(run_dir, "alarm")
    assert alarms  # both nights meet the step
    marks = _by_gid(fig, "alarm-marker")
    # An alarm of the set-point leaving its range has no statistic's value to mark.
    assert sorted(m.get_ydata()[0] for m in marks) == pytest.approx(
        sorted(a["value"] for a in alarms if a["value"] is not None))
    valued = [a for a in alarms if a["value"] is not None]
    assert all(a["value"] > a["threshold"] for a in valued)
    printed = [text.get_text() for ax in fig.axes for text in ax.texts]
    for a in valued:
        assert f"alarm: {a['statistic']} {a['value']:.2f} > {a['threshold']:.2f}" in printed


def test_a_failed_recovery_is_shaded_red_and_marked(folders, reports):
    """The failed night: its recoveries not accepted are red spans, each failure a red cross
    (under the beam ceiling a calibration the night cannot pay for after a rejected retune is
    a budget decision, not a failure: the crosses then match the failures journaled, if any)."""
    run_dir = folders["failed"]
    fig = _figure(reports(run_dir), "", "night").figure
    failures = _decisions(run_dir, "failure")
    assert len(_by_gid(fig, "failure")) == len(failures)
    assert failures or _decisions(run_dir, "budget")
    done = _decisions(run_dir, "stage_done")
    assert any("below_acceptance" in d["reason"] for d in done)
    rows = dict(report_header(report.load_run(run_dir)))
    assert f"{len(failures)} failure" in rows["night"]


@pytest.mark.parametrize("name", ["recovered", "failed"])
def test_the_night_draws_inversion_reference_phase_error_and_beam_share(folders, reports, name):
    """Each check's inversion and phase error (phase shift minus the stored phase at the peak);
    the reference is the hold state's weighted mean; the beam share ends at the result's
    holding beam time over the rig time elapsed; the budget is the result's."""
    run_dir = folders[name]
    fig = _figure(reports(run_dir), "", "night").figure
    holds = _holds(run_dir)
    checks = {r["point"]: r for r in _estimates(run_dir) if r["label"] == "hold"}
    (inv,) = _by_gid(fig, "night-checks")
    np.testing.assert_allclose(inv.get_ydata(),
                               [checks[h["point"]]["estimate"]["inversion"] for h in holds])
    (ref,) = _by_gid(fig, "reference")
    np.testing.assert_allclose(ref.get_ydata(), [h["state"]["reference"]["weighted"]
                                                 / h["state"]["reference"]["weight"]
                                                 for h in holds])
    (phase,) = _by_gid(fig, "phase-error")
    expected = []
    for h in holds:
        error = checks[h["point"]]["estimate"]["phase_shift"] - h["state"]["prior"]["phase_at_peak_rad"]
        expected.append(math.remainder(error, 2.0 * math.pi) / math.pi)
    np.testing.assert_allclose(phase.get_ydata(), expected, atol=1e-12)
    result = read_json(run_dir / RESULT_NAME)
    (share,) = _by_gid(fig, "beam-share")
    last_h = share.get_xdata()[-1]
    assert share.get_ydata()[-1] / 100.0 * last_h * 3600.0 == pytest.approx(
        result["holding_beam_s"])
    (budget,) = _by_gid(fig, "budget")
    assert budget.get_ydata()[0] == pytest.approx(100.0 * result["budget_fraction"])
    corrections = [d for d in _decisions(run_dir, "correct") if "to" in d]
    drawn = _by_gid(fig, "corrections")
    assert sum(len(d.get_ydata()) for d in drawn) == len(corrections)


def test_a_night_that_never_held_still_draws_its_stages(folders, reports):
    """No check at all: the night figure says so and shades its failed recoveries."""
    run_dir = folders["never"]
    built = reports(run_dir)
    item = _figure(built, "", "night")
    assert not _holds(run_dir)
    assert "0 checks" in item.caption
    texts = [t.get_text() for ax in item.figure.axes for t in ax.texts]
    assert "no check: the night never held" in texts
    assert any("below_acceptance" in t for t in texts)


@pytest.mark.parametrize("name", ["dry", "recovered", "failed", "never"])
def test_every_figure_is_written_with_units_on_its_axes(folders, reports, name, tmp_path):
    """Every figure of a dry run and of each night is written as a PNG, and every axis label
    names its unit in parentheses."""
    built = reports(folders[name])
    for item in built.figures:
        for ax in item.figure.axes:
            for label in (ax.get_xlabel(), ax.get_ylabel()):
                if label:
                    assert label.rstrip().endswith(")"), (item.key, label)
    text = report.write_report(folders[name], out=tmp_path / "out")
    pngs = sorted((tmp_path / "out").glob("report-*.png"))
    assert len(pngs) == len(built.figures) and "page:" in text
    assert all(p.read_bytes()[:8] == PNG_SIGNATURE for p in pngs)
