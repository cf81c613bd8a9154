"""``autotune track`` in process (autotune.run.track on the simulated rig through LocalRig: the real
protocol without a socket): a night's journal, a thermal step found and recovered, every cut of
a night's journal resumed, the stop conditions and where they leave the rig, the checks before
the first move. Real processes, sockets and signals are in tests/test_survival.py and
tests/test_track_process.py.

The outside reference for the quality of the night is the simulated rig's noiseless truth
(``truth`` op, sampled on a grid of rig time by autotune.bench's watcher).
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import math
import re
import shutil
import threading
import tomllib
from datetime import datetime
from typing import Any

import pytest

from autotune.bench import night_rig as bench_night_rig
from autotune.run import runner
from autotune.run import night_clock, track
from autotune.config import load_config
from autotune.run.display import night_progress_text
from autotune.errors import ConfigErrors, Interrupted, JournalError
from autotune.run.journal import JOURNAL_NAME, RESULT_NAME, read_journal, read_json
from autotune.progress import NightProgress, StageProgress
from autotune.kit.server import LocalRig
from drivers_sim.config import load_sim_config, sim_config_from_dict
from drivers_sim.driver import SimulatedDriver
from drivers_sim.rig import SimulatedRig
from journal_checks import check_invariants, journal_shots
from rig_process import REPO

DRY_RUN = REPO / "configs" / "dry-run.toml"
SIM = REPO / "configs" / "sim-rig.toml"
HOURS = 2.0


def night_config(hours: float = HOURS, **track_changes: Any):
    """The dry-run settings at small sizes, a night of ``hours`` of rig time."""
    config = load_config(DRY_RUN)
    return dataclasses.replace(
        config,
        measurement=dataclasses.replace(config.measurement, resamples=300),
        track=dataclasses.replace(config.track, max_rig_time_s=hours * 3600.0, **track_changes))


def _rig(seed: int) -> LocalRig:
    return LocalRig(SimulatedDriver(SimulatedRig(load_sim_config(SIM), seed)))


#: The tests that read the module-scoped fixture run on one worker (pytest-xdist's
#: loadgroup), so that it is built once; the others go to any worker.
_SHARES_FIXTURE = pytest.mark.xdist_group("test_track")


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A calibration, then a two-hour night with a +15 kHz thermal step after 50 minutes,
    watched on a one-minute grid of the truth."""
    base = tmp_path_factory.mktemp("night")
    rig = _rig(23)
    # A two-hour night at the default 5 % has a 6 min ceiling, about its first retune and one
    # recovery: a tenth leaves room for the checks this test reads.
    config = night_config(budget_fraction=0.1)
    store = base / "good.json"
    runner.calibrate(rig, config, base / "calibrate", store=store)
    start = rig.sim.clock
    watched = bench_night_rig._NightRig(rig, [(start + 3000.0, 15e3)], 60.0)
    watched.watching = True
    progress: list[Any] = []
    result = track.track(watched, config, base / "night", store=store, progress=progress.append)
    watched._tick()
    return {"rig": rig, "watched": watched, "config": config, "base": base, "store": store,
            "result": result, "start": start, "progress": progress,
            "records": read_journal(base / "night" / JOURNAL_NAME)}


@_SHARES_FIXTURE
def test_a_night_journals_every_check_correction_and_decision(night):
    """One run folder for the night: every check has its hold record with the numbers and the
    state, every correction a 'correct' decision with from/to followed by its moves, every
    plan its numbers; the counts of the result are the journal's, and the invariants hold."""
    records, result = night["records"], night["result"]
    check_invariants(records)
    holds = [r for r in records if r["type"] == "hold"]
    assert result["status"] == "ended" and result["checks"] == len(holds) >= 8
    corrections = [r for r in records if r["type"] == "decision" and r["what"] == "correct"
                   and "point" in r]
    assert result["corrections"] == len(corrections) > 0
    for rec in corrections:
        assert set(rec["from"]) == set(rec["to"]) == {"velocity", "detuning"} and rec["reason"]
    for rec in holds:
        numbers = rec["numbers"]
        assert {"offset_hz", "innovation", "upper", "lower", "inversion", "lock"} <= set(numbers)
        assert {"lock", "tests", "plan", "held", "prior"} <= set(rec["state"])
    plans = [r for r in records if r["type"] == "decision" and r["what"] == "plan"]
    assert plans and all({"interval_s", "shots_per_phase", "test", "check_share"}
                         <= set(p["plan"]) for p in plans)
    assert all(p["plan"]["check_share"] <= 0.5 * 0.1 + 1e-9 for p in plans)
    assert result["holding_beam_s"] <= result["budget_ceiling_s"] + 1e-6
    assert (night["base"] / "night" / RESULT_NAME).exists()
    stop = [r for r in records if r["type"] == "decision" and r["what"] == "stop"]
    assert len(stop) == 1 and "max_rig_time_s" in stop[0]["reason"]
    # Every shot of the night is in its journal (the rig's counter includes the calibration).
    calibration = read_journal(night["base"] / "calibrate" / JOURNAL_NAME)
    assert night["rig"].status().shots_total == journal_shots(records) + journal_shots(calibration)


@_SHARES_FIXTURE
def test_on_the_demos_signal_the_outlook_is_journaled_once_without_a_warning(night):
    """Before the first check, one step_outlook decision: on the demo rig's signal the first
    plan's checks confirm a 15 kHz step within 15 min, so it is an info decision with its
    numbers, nothing to change, and the result keeps it."""
    records, result = night["records"], night["result"]
    outlooks = [r for r in records if r["type"] == "decision" and r["what"] == "step_outlook"]
    assert len(outlooks) == 1
    first_hold = next(i for i, r in enumerate(records) if r["type"] == "hold")
    assert records.index(outlooks[0]) < first_hold
    numbers = outlooks[0]["outlook"]
    assert numbers["met"] is True and numbers["warning"] is None
    assert 0.0 < numbers["confirm_s"] <= numbers["within_s"] == 900.0
    assert numbers["budget_fraction_needed"] is None and numbers["atoms_factor_needed"] is None
    assert "within 15 min" in outlooks[0]["reason"]
    assert result["step_outlook"] == numbers


@_SHARES_FIXTURE
def test_the_night_tells_its_progress_and_the_journal_agrees(night):
    """A progress item after every check (as many as hold records, the last with the result's
    counts), one before each wait, the stages' own progress during the retunes, and none of a
    stage while the night checks."""
    items, records, result = night["progress"], night["records"], night["result"]
    checks = [p for p in items if isinstance(p, NightProgress) and p.event == "check"]
    holds = [r for r in records if r["type"] == "hold"]
    assert len(checks) == len(holds) == result["checks"]
    last = checks[-1]
    for key in ("corrections", "alarms", "retunes", "calibrations"):
        assert getattr(last, key) <= result[key]
    assert [c.checks for c in checks] == list(range(1, len(checks) + 1))
    assert all(c.inversion is not None and c.interval[0] <= c.inversion <= c.interval[1]
               for c in checks)
    assert all(c.action == h["action"] for c, h in zip(checks, holds))
    waits = [p for p in items if isinstance(p, NightProgress) and p.event == "wait"]
    assert len(waits) >= len([r for r in records if r["type"] == "wait"]) > 0
    assert all(w.next_in_s > 0 and 0 <= w.night_s <= w.end_s for w in waits)
    stages = [p for p in items if isinstance(p, StageProgress)]
    assert {p.stage for p in stages} == {"retune"} and result["retunes"] >= 2
    assert not any(p.label == "hold" for p in stages)
    assert "night" in night_progress_text(last) and "beam" in night_progress_text(last)


@_SHARES_FIXTURE
def test_the_thermal_step_is_found_and_the_condition_recovered(night):
    """The +15 kHz step of the cavity (its detuning up, so the peak's set-point down) raises the
    alarm of the lower statistic, the guided retune inside the night recovers, and the
    truth is back at 97 % of the moving best within 10 minutes of rig time; the night as a
    whole spends at least 90 % of its rig time there, holding within its budget (a ceiling)."""
    records, watched = night["records"], night["watched"]
    alarms = [r for r in records if r["type"] == "decision" and r["what"] == "alarm"]
    assert alarms and alarms[0]["statistic"] in ("lower", "out_of_range")
    retunes = [r for r in records if r["type"] == "decision" and r["what"] == "retune"]
    assert [r["index"] for r in retunes][:2] == [0, 1]
    end = night["start"] + HOURS * 3600.0
    delays = bench_night_rig._recovery_delays(watched.samples, watched.applied, 0.97)
    assert delays[0] is not None and delays[0] <= 600.0, delays
    # Each interval counted at the lower of its two ends (the study's count): a step in a
    # two-hour night weighs four times what it weighs in the study's eight hours.
    assert bench_night_rig._fraction_at(watched.samples, end, 0.97) >= 0.90
    # The ceiling, not a target: never above the night's budget fraction.
    assert night["result"]["holding_share"] <= night["config"].track.budget_fraction + 1e-9


@_SHARES_FIXTURE
def test_the_store_holds_the_latest_accepted_retune_with_its_lock_prior(night):
    """After the night the last good calibration is the night's last accepted stage."""
    stored = read_json(night["store"])
    done = [r for r in night["records"] if r["type"] == "decision" and r["what"] == "stage_done"]
    last = [r for r in done if r["outcome"]["accepted"]][-1]
    assert stored["setpoints"] == pytest.approx(last["outcome"]["setpoints"])
    assert stored["lock_prior"] is not None and stored["run_dir"].endswith("night")


@_SHARES_FIXTURE
def test_a_stage_done_names_its_setpoints_in_the_units_a_physicist_reads(night):
    """README (Progress and logs): velocity to 0.1 m/s, detuning in kHz to 0.01, as every other
    decision of the night; not raw Hz and m/s to six digits."""
    done = [r for r in night["records"] if r["type"] == "decision" and r["what"] == "stage_done"]
    assert done
    for rec in done:
        sp = rec["outcome"]["setpoints"]
        assert rec["reason"].endswith(f"at velocity {sp['velocity']:.1f} m/s, "
                                      f"detuning {sp['detuning'] / 1e3:+.2f} kHz"), rec["reason"]


def _cuts(records: list[dict[str, Any]]) -> list[tuple[str, int, bool]]:
    names: dict[str, int] = {}
    for index, rec in enumerate(records[:-1]):
        name = rec["type"] if rec["type"] != "decision" else f"decision:{rec['what']}"
        if rec["type"] == "measurement":
            name += f":{rec['label']}"
        names.setdefault(name, index)
    # Also inside the retune of the night (its first records after the alarm).
    alarm = next(i for i, r in enumerate(records) if r["type"] == "decision" and r["what"] == "alarm")
    for offset, rec in enumerate(records[alarm:alarm + 12]):
        names.setdefault(f"night-retune-{rec['type']}", alarm + offset)
    return [(name, index, bool(number % 2))
            for number, (name, index) in enumerate(sorted(names.items(), key=lambda kv: kv[1]))]


#: The default suite's sample of the night's cuts: every record type once, in each part of the
#: night (its opening retune, the holding, the retune begun inside it after the alarm, its end),
#: whole and half-written lines both. Each cut resumes the rest of a two-hour night, so the
#: sample takes the latest cut of each type it can: 15 of the 31 cuts, 7 of the 17 that
#: resume a whole night. The slow suite runs the other cuts (.ci/run runs it).
DEFAULT_CUTS = frozenset({
    "start", "estimate", "wait", "measurement:hold", "hold", "decision:correct", "move",
    "decision:alarm", "night-retune-stage", "night-retune-proposal",
    "night-retune-measurement", "night-retune-request", "night-retune-acquisition",
    "decision:stop", "safe"})


def _resume_cuts(night: dict[str, Any], tmp_path: Any, default: bool) -> None:
    """Resume a copy of the night cut at each cut of the sample (``default``) or of the rest."""
    source = night["base"] / "night"
    records = night["records"]
    cuts = [cut for cut in _cuts(records) if (cut[0] in DEFAULT_CUTS) == default]
    kinds = {name.removeprefix("night-retune-").split(":")[0] for name, _, _ in cuts}
    if default:
        assert {"start", "wait", "hold", "measurement", "request", "acquisition", "estimate",
                "move", "stage", "proposal", "decision", "safe"} <= kinds, kinds
        assert {partial for _, _, partial in cuts} == {True, False}
    for number, (name, index, partial) in enumerate(cuts):
        run = tmp_path / f"{number}-{name.replace(':', '-')}"
        shutil.copytree(source, run)
        lines = (source / JOURNAL_NAME).read_bytes().splitlines(keepends=True)
        data = b"".join(lines[: index + 1])
        if partial:
            data += lines[index + 1][: len(lines[index + 1]) // 2]
        (run / JOURNAL_NAME).write_bytes(data)
        (run / RESULT_NAME).unlink()
        store = tmp_path / f"good-{number}.json"
        shutil.copy(night["store"], store)
        result = track.track(night["rig"], night["config"], run, resume=True, store=store)
        after = read_journal(run / JOURNAL_NAME)
        check_invariants(after)
        assert after[: index + 1] == records[: index + 1], f"cut after {name}"
        assert read_json(run / RESULT_NAME)["status"] == result["status"] == "ended"


@_SHARES_FIXTURE
def test_a_night_cut_after_any_record_kind_resumes_and_finishes(night, tmp_path):
    """Cut after a record of every type (whole, or with half of the next line), in the opening
    retune, the holding, the retune begun inside the night and at its end, the night resumes,
    finishes what was in flight without measuring anything twice, and keeps the journal's
    invariants (the sample DEFAULT_CUTS; the slow test below resumes every other cut)."""
    _resume_cuts(night, tmp_path, default=True)


@pytest.mark.slow
@_SHARES_FIXTURE
def test_every_other_cut_of_the_night_resumes_and_finishes(night, tmp_path):
    """The complete matrix with the test above: after the first record of every kind (every
    decision and measurement label) and at each of the first records of the retune inside
    the night."""
    _resume_cuts(night, tmp_path, default=False)


@_SHARES_FIXTURE
def test_a_finished_night_is_not_resumed(night, tmp_path):
    """A night that ended is refused on --resume, naming why."""
    run = tmp_path / "done"
    shutil.copytree(night["base"] / "night", run)
    with pytest.raises(JournalError, match="already ended"):
        track.track(night["rig"], night["config"], run, resume=True, store=night["store"])


def test_a_stop_signal_between_checks_can_leave_the_rig_at_the_held_setpoints(tmp_path):
    """on_stop = last_good: a stop between checks leaves the rig where the lock held it (no
    move), journals why, and the night resumes to its end from there."""
    rig = _rig(5)
    config = night_config(hours=2.0, on_stop="last_good")
    store = tmp_path / "good.json"
    runner.calibrate(rig, config, tmp_path / "calibrate", store=store)

    class StopAfterChecks(bench_night_rig._NightRig):
        def advance(self, seconds: float) -> dict[str, Any]:
            holds = sum(1 for r in read_journal(tmp_path / "night" / JOURNAL_NAME)
                        if r["type"] == "hold")
            # After the first check, a stop while waiting for the next (the night's cadence is
            # this rig's: since session 9's calibration a check every 36 min, so 2 h of night).
            if holds >= 1:
                stop.set()
            return super().advance(seconds)

    stop = threading.Event()
    watched = StopAfterChecks(rig, [], 60.0)
    with pytest.raises(Interrupted) as info:
        track.track(watched, config, tmp_path / "night", store=store, stop=stop)
    assert info.value.safe is None
    records = read_journal(tmp_path / "night" / JOURNAL_NAME)
    assert records[-1]["status"] == "interrupted" and not any(r["type"] == "safe" for r in records)
    held = [r for r in records if r["type"] == "hold"][-1]["state"]["held"]
    assert rig.status().setpoints == pytest.approx(held)
    result = track.track(rig, config, tmp_path / "night", resume=True, store=store)
    assert result["status"] == "ended" and result["left_at"] == "the held set-points"
    check_invariants(read_journal(tmp_path / "night" / JOURNAL_NAME))


def test_consecutive_failed_recoveries_stop_the_night(tmp_path):
    """An acceptance bar no stage can reach: each recovery (retune, then calibration) fails,
    and after max_consecutive_failures of them the night stops, gave_up, rig safe."""
    rig = _rig(9)
    config = night_config(hours=6.0, max_consecutive_failures=2)
    store = tmp_path / "good.json"
    runner.calibrate(rig, config, tmp_path / "calibrate", store=store)
    config = dataclasses.replace(config, min_inversion=0.99,
                                 search=dataclasses.replace(config.search, max_points=6))
    result = track.track(rig, config, tmp_path / "night", store=store)
    assert result["status"] == "gave_up" and result["failures"] == 2
    records = read_journal(tmp_path / "night" / JOURNAL_NAME)
    check_invariants(records)
    failures = [r for r in records if r["type"] == "decision" and r["what"] == "failure"]
    assert len(failures) == 2 and "max_consecutive_failures" in failures[-1]["reason"]
    kinds = [r["what"] for r in records if r["type"] == "decision"
             and r["what"] in ("retune", "calibrate")]
    # A stage the budget cannot pay for is not begun: a 'budget' decision stands in its place.
    skipped = [r["kind"] for r in records if r["type"] == "decision" and r["what"] == "budget"
               and r["action"] in ("correct", "hold")]
    assert kinds[:3] == ["retune", "calibrate", "retune"]
    assert kinds + skipped == ["retune", "calibrate", "retune", "calibrate"]
    assert result["holding_beam_s"] <= result["budget_ceiling_s"] + 1e-6
    assert records[-2]["type"] == "safe"


def test_a_retune_not_accepted_but_as_good_as_the_last_calibration_is_held(tmp_path):
    """A thermal step before the night and a shortfall bar no retune can vouch for (0.01 %):
    the night's first retune is not accepted, but its verified inversion is not below the last good calibration's (the z-test
    of hold.holds_as_well), so the night holds its point (an 'adopt' decision) and checks on,
    without a calibration; the last good calibration is not replaced."""
    rig = _rig(23)
    config = night_config(hours=1.0, budget_fraction=0.2)
    store = tmp_path / "good.json"
    runner.calibrate(rig, config, tmp_path / "calibrate", store=store)
    stored = store.read_text()
    rig.thermal_step(15e3)
    config = dataclasses.replace(config, max_shortfall=1e-4)
    result = track.track(rig, config, tmp_path / "night", store=store)
    records = read_journal(tmp_path / "night" / JOURNAL_NAME)
    check_invariants(records)
    decisions = [r for r in records if r["type"] == "decision"]
    done = next(r for r in decisions if r["what"] == "stage_done")
    assert done["index"] == 0 and done["outcome"]["status"] == "below_acceptance"
    adopt = [r for r in decisions if r["what"] == "adopt"]
    assert len(adopt) >= 1 and adopt[0]["index"] == 0 and adopt[0]["test"]["holds"]
    assert adopt[0]["test"]["p"] >= adopt[0]["test"]["level"]
    assert not [r for r in decisions if r["what"] == "calibrate"]
    assert result["status"] == "ended" and result["checks"] >= 1 and result["failures"] == 0
    assert store.read_text() == stored
    # Cut after the retune's stage_done and after the adopt decision, resumed with half an hour
    # of the night left on the rig's clock: the resume holds the same point once, with one adopt
    # decision and still no calibration.
    config = dataclasses.replace(config, track=dataclasses.replace(
        config.track, max_rig_time_s=config.track.max_rig_time_s + 1800.0))
    lines = (tmp_path / "night" / JOURNAL_NAME).read_bytes().splitlines(keepends=True)
    for what in ("stage_done", "adopt"):
        index = next(i for i, r in enumerate(records)
                     if r["type"] == "decision" and r["what"] == what)
        run = tmp_path / f"cut-{what}"
        shutil.copytree(tmp_path / "night", run)
        (run / JOURNAL_NAME).write_bytes(b"".join(lines[: index + 1]))
        (run / RESULT_NAME).unlink()
        again = track.track(rig, config, run, resume=True, store=store)
        after = read_journal(run / JOURNAL_NAME)
        check_invariants(after)
        assert after[: index + 1] == records[: index + 1]
        decided = [r for r in after if r["type"] == "decision"]
        assert [r["index"] for r in decided if r["what"] == "adopt"][:1] == [0]
        assert sum(r["what"] == "adopt" and r["index"] == 0 for r in decided) == 1
        assert not [r for r in decided if r["what"] == "calibrate"]
        assert again["status"] == "ended"


def test_a_night_without_a_last_good_calibration_calibrates_first(tmp_path):
    """No store: the night begins with a calibration (its beam time is not counted as
    holding), then holds."""
    rig = _rig(13)
    # The mechanics of a night that must calibrate first; whether that calibration can vouch
    # for 2 % is the acceptance tests' (a rejected one is a failed recovery, tested apart), and
    # half an hour at the default 5 % of beam pays for no check after it (the ceiling's tests).
    config = dataclasses.replace(night_config(hours=0.5, budget_fraction=0.2), max_shortfall=1.0)
    result = track.track(rig, config, tmp_path / "night", store=tmp_path / "good.json")
    records = read_journal(tmp_path / "night" / JOURNAL_NAME)
    first = next(r for r in records if r["type"] == "decision" and r["what"] in ("retune",
                                                                                  "calibrate"))
    assert first["what"] == "calibrate" and "no last good calibration" in first["reason"]
    assert result["calibrations"] == 1 and result["checks"] >= 1
    assert result["holding_beam_s"] < result["rig_time_s"]
    assert json.loads((tmp_path / "good.json").read_text())["lock_prior"] is not None


def test_the_wall_clock_ends_a_night(tmp_path):
    """max_wall_time_s: the night stops once that much wall time passed since it began (a
    clock injected for the test), whatever its rig time."""
    rig = _rig(17)
    config = night_config(hours=0.0, max_wall_time_s=100.0)
    store = tmp_path / "good.json"
    runner.calibrate(rig, config, tmp_path / "calibrate", store=store)
    ticks = iter(range(0, 10_000, 20))
    result = track.track(rig, config, tmp_path / "night", store=store,
                         wall=lambda: 1.9e9 + next(ticks))
    assert result["status"] == "ended" and "max_wall_time_s" in result["stop_reason"]


def test_everything_wrong_is_refused_before_the_first_move(tmp_path):
    """Checks too small for the budget, a retune's shots above the rig's limit and a store
    under a regular file: all named together, nothing written, the rig untouched."""
    rig = _rig(3)
    blocker = tmp_path / "plain-file"
    blocker.write_text("x")
    config = night_config(min_shots_per_phase=5000, retune_shots_per_phase=200_000)
    config = dataclasses.replace(config, calibration_store=blocker / "good.json")
    before = rig.status()
    with pytest.raises(ConfigErrors) as info:
        track.prepare_track(rig, config, tmp_path / "night")
    keys = {p.key for p in info.value.problems}
    assert {"track.min_shots_per_phase", "track.retune_shots_per_phase",
            "calibration.store"} <= keys
    assert not (tmp_path / "night").exists()
    assert rig.status().shots_total == before.shots_total


def test_the_end_at_a_local_time_is_the_next_one_after_the_start():
    """end_at_local_time "HH:MM": the first such local time after the night began (the next
    morning for a night begun in the evening, the same day for one begun after midnight)."""
    evening = datetime(2026, 12, 2, 22, 15).timestamp()
    assert math.isclose(night_clock.NightClock.local_end(evening, 7 * 60 + 30),
                        datetime(2026, 12, 3, 7, 30).timestamp())
    small_hours = datetime(2026, 12, 3, 1, 5).timestamp()
    assert math.isclose(night_clock.NightClock.local_end(small_hours, 7 * 60 + 30),
                        datetime(2026, 12, 3, 7, 30).timestamp())


class _RealClockRig:
    """The simulated rig seen as a real one: it describes itself as not simulated, offers no
    ``advance``, and its own clock moves on while autotune waits: by ``step_s`` of rig time at
    every ``status`` read (a fixed step, not the wall clock, so that the test does not depend
    on how loaded the machine is). The night must then wait by reading the rig's clock.
    ``on_status`` is called after each read."""

    HIDDEN = ("advance", "truth", "thermal_step")

    def __init__(self, rig: LocalRig, step_s: float) -> None:
        self._rig, self._step_s = rig, step_s
        self.on_status: Any = None

    def describe(self):
        return dataclasses.replace(self._rig.describe(), simulated=False)

    def status(self):
        self._rig.advance(self._step_s)
        status = self._rig.status()
        if self.on_status is not None:
            self.on_status()
        return status

    def __getattr__(self, name: str) -> Any:
        if name in self.HIDDEN:
            raise AttributeError(name)
        return getattr(self._rig, name)


def test_a_real_rig_is_waited_for_in_wall_time_and_a_stop_ends_the_wait(tmp_path, monkeypatch):
    """A rig that is not simulated: the night's waits are 'wall' waits that end when the rig's
    own clock (read with status) reaches the planned check, and a stop (the SIGINT/SIGTERM
    event) ends a wait at once, resumable (README: Waiting between checks). The rig's clock
    moves 15 s at each read and the night reads it every millisecond here, instead of every
    30 s of wall time; the stop comes at the second read of the third wait, whatever the
    machine's load (it used to come from a timer, and a loaded machine could end the night
    first)."""
    monkeypatch.setattr(night_clock, "_WALL_POLL_S", 0.001)
    rig = _rig(29)
    # An hour at 5 % affords little besides its first retune: a fifth leaves room for checks.
    config = night_config(hours=1.0, budget_fraction=0.2)
    store = tmp_path / "good.json"
    runner.calibrate(rig, config, tmp_path / "calibrate", store=store)
    paced = _RealClockRig(rig, step_s=15.0)
    stop = threading.Event()
    waits: list[Any] = []
    reads_in_third_wait: list[int] = []

    def progress(item: Any) -> None:
        if isinstance(item, NightProgress) and item.event == "wait":
            waits.append(item)

    def on_status() -> None:
        if len(waits) == 3:
            reads_in_third_wait.append(1)
            if len(reads_in_third_wait) == 2:
                stop.set()  # a stop in the middle of this wait

    paced.on_status = on_status
    with pytest.raises(Interrupted, match="while waiting"):
        track.track(paced, config, tmp_path / "night", store=store, stop=stop,
                    progress=progress)
    paced.on_status = None
    records = read_journal(tmp_path / "night" / JOURNAL_NAME)
    wall_waits = [r for r in records if r["type"] == "wait"]
    assert len(wall_waits) == 3 and all(r["how"] == "wall" for r in wall_waits)
    # Each check before the stop came once the rig clock had reached its wait's target.
    holds = {r["point"]: r for r in records if r["type"] == "hold"}
    checks = [r for r in records if r["type"] == "measurement" and r["label"] == "hold"]
    for wait in wall_waits[:-1]:
        check = next(c for c in checks if c["point"] == wait["point"])
        first = next(r for r in records if r["type"] == "acquisition"
                     and r["seq"] > check["seq"])
        assert first["t_start"] >= wait["until_clock"] - 1e-6
    assert len(holds) >= 2
    assert records[-1] == {**records[-1], "type": "end", "status": "interrupted"}
    # Resumed, the night finishes its hour waiting on the rig's clock.
    result = track.track(paced, config, tmp_path / "night", resume=True, store=store)
    assert result["status"] == "ended" and result["checks"] > len(holds)
    check_invariants(read_journal(tmp_path / "night" / JOURNAL_NAME))


def test_a_night_whose_checks_slow_after_a_retune_tells_its_outlook_again_and_resumes_quietly(
        tmp_path):
    """A rig with 0.07 atoms per sample (about 0.035 detected per shot) over a 2.5 h night at
    the default 5 %: the first plan confirms a 15 kHz step within 15 min (an info outlook);
    a thermal step's retune eats into the budget, the later plans' checks come less often,
    and the plan that crosses the 15 min line tells the outlook again, hours into the night,
    as a warning with its numbers (the same numbers as that plan's). result.json keeps the
    first (``step_outlook``) and the last (``last_step_outlook``). A night cut just after
    that later outlook resumes without telling it again (it is on the same side of the line)."""
    data = tomllib.loads(SIM.read_text())
    data["rig"]["atoms_per_sample"] = 0.07
    data["drift"]["random_walk_hz_per_sqrt_s"] = 0.0
    rig = LocalRig(SimulatedDriver(SimulatedRig(sim_config_from_dict(data), 5)))
    config = dataclasses.replace(night_config(hours=2.5), min_inversion=0.3)
    store = tmp_path / "good.json"
    runner.calibrate(rig, config, tmp_path / "calibrate", store=store)
    shutil.copy(store, tmp_path / "good-start.json")
    start = rig.sim.clock
    watched = bench_night_rig._NightRig(rig, [(start + 1800.0, 15e3), (start + 5400.0, -15e3)],
                                        60.0)
    result = track.track(watched, config, tmp_path / "night", store=store)
    records = read_journal(tmp_path / "night" / JOURNAL_NAME)
    check_invariants(records)
    assert result["status"] == "ended"
    told = [i for i, r in enumerate(records)
            if r["type"] == "decision" and r["what"] == "step_outlook"]
    first, last = records[told[0]]["outlook"], records[told[-1]]["outlook"]
    first_hold = next(i for i, r in enumerate(records) if r["type"] == "hold")
    assert told[0] < first_hold and first["met"] is True and first["later"] is False
    assert len(told) >= 2, "no later plan crossed the line"
    # Told again only where the plan's side of the line changed (hold_outlook.outlook_due).
    sides = [records[i]["outlook"]["met"] for i in told]
    assert all(a != b for a, b in itertools.pairwise(sides)), sides
    later = records[told[1]]
    numbers = later["outlook"]
    assert numbers["later"] is True and numbers["met"] is False
    assert numbers["confirm_s"] > numbers["within_s"] == 900.0
    assert numbers["check_share"] < first["check_share"]
    said = re.fullmatch(r"(\d+\.\d) h into the night, (.+)", later["reason"])
    assert said and said.group(2) == numbers["warning"], later["reason"]
    assert "the night runs as configured" in later["detail"]
    # The plan it was told for is the next decision, with the same numbers; the hours said are
    # that plan's rig time into the night, to the tenth the reason shows.
    plan = next(r for r in records[told[1]:] if r["type"] == "decision" and r["what"] == "plan")
    assert float(said.group(1)) == pytest.approx(plan["night_rig_time_s"] / 3600.0, abs=0.051)
    assert plan["night_rig_time_s"] > 1800.0
    assert plan["plan"]["step_delay_s"] == numbers["confirm_s"]
    assert plan["plan"]["interval_s"] == numbers["interval_s"]
    assert plan["plan"]["shots_per_phase"] == numbers["shots_per_phase"]
    assert result["step_outlook"] == first and result["last_step_outlook"] == last
    # Cut after the later outlook (whole line, then with half of the next): resumed, the night
    # plans again on the same side of the line and tells nothing new before that plan.
    for partial in (False, True):
        run = tmp_path / f"cut-{int(partial)}"
        shutil.copytree(tmp_path / "night", run)
        lines = (tmp_path / "night" / JOURNAL_NAME).read_bytes().splitlines(keepends=True)
        data_cut = b"".join(lines[: told[1] + 1])
        if partial:
            data_cut += lines[told[1] + 1][: len(lines[told[1] + 1]) // 2]
        (run / JOURNAL_NAME).write_bytes(data_cut)
        (run / RESULT_NAME).unlink()
        again = tmp_path / f"good-{int(partial)}.json"
        shutil.copy(tmp_path / "good-start.json", again)
        # A rig of the same kind whose clock stands where the cut left the night (the first
        # rig's has run to the night's end, which would end the resumed night at once).
        fresh = LocalRig(SimulatedDriver(SimulatedRig(sim_config_from_dict(data), 6)))
        fresh.advance(max(r["t_end"] for r in records[: told[1] + 1] if "t_end" in r))
        resumed = track.track(fresh, config, run, resume=True, store=again)
        after = read_journal(run / JOURNAL_NAME)
        check_invariants(after)
        assert after[: told[1] + 1] == records[: told[1] + 1]
        replan = next(i for i, r in enumerate(after) if i > told[1]
                      and r["type"] == "decision" and r["what"] == "plan")
        assert not [r for r in after[told[1] + 1:replan]
                    if r["type"] == "decision" and r["what"] == "step_outlook"]
        assert resumed["status"] == "ended"
        assert resumed["step_outlook"] == first
        retold = [r["outlook"] for r in after if r["type"] == "decision"
                  and r["what"] == "step_outlook"]
        assert resumed["last_step_outlook"] == retold[-1]


def test_a_night_that_spends_its_budget_stays_under_it_and_resumes_from_its_budget_records(
        tmp_path):
    """A two-hour night at the default 5 % (a 6 min ceiling) with a thermal step: its first
    retune and the recovery spend most of it, so the checks are planned again within what is
    left, then stop ('unwatched'); holding never passes the ceiling, and a night cut after each
    of those budget records (whole, or with half of the next line) resumes, finishes and keeps
    both the ceiling and the journal's invariants."""
    rig = _rig(23)
    config = night_config()
    store = tmp_path / "good.json"
    runner.calibrate(rig, config, tmp_path / "calibrate", store=store)
    start = rig.sim.clock
    watched = bench_night_rig._NightRig(rig, [(start + 3000.0, 15e3)], 60.0)
    shutil.copy(store, tmp_path / "good-start.json")
    result = track.track(watched, config, tmp_path / "night", store=store)
    records = read_journal(tmp_path / "night" / JOURNAL_NAME)
    check_invariants(records)
    assert result["status"] == "ended"
    assert result["holding_beam_s"] <= result["budget_ceiling_s"] + 1e-6
    assert result["budget_ceiling_s"] == pytest.approx(0.05 * 2 * 3600.0)
    marks = [i for i, r in enumerate(records[:-1]) if r["type"] == "decision" and (
        r["what"] in ("budget", "unwatched")
        or (r["what"] == "plan" and "budget left cannot pay" in r["reason"]))]
    assert marks, "the night never reached its ceiling"
    assert result["budget_limited"] >= 1
    for number, index in enumerate(marks[:3]):
        run = tmp_path / f"cut-{number}"
        shutil.copytree(tmp_path / "night", run)
        lines = (tmp_path / "night" / JOURNAL_NAME).read_bytes().splitlines(keepends=True)
        data = b"".join(lines[: index + 1])
        if number % 2:
            data += lines[index + 1][: len(lines[index + 1]) // 2]
        (run / JOURNAL_NAME).write_bytes(data)
        (run / RESULT_NAME).unlink()
        again = tmp_path / f"good-{number}.json"
        shutil.copy(tmp_path / "good-start.json", again)
        resumed = track.track(rig, config, run, resume=True, store=again)
        after = read_journal(run / JOURNAL_NAME)
        check_invariants(after)
        assert after[: index + 1] == records[: index + 1]
        assert resumed["status"] == "ended"
        assert resumed["holding_beam_s"] <= resumed["budget_ceiling_s"] + 1e-6


@_SHARES_FIXTURE
def test_a_night_cut_inside_a_check_after_the_hour_finishes_that_check_before_planning(
        night, tmp_path):
    """A night killed inside a check (an acquisition of it filed) that resumes after its
    hourly plan fell due finishes that check with the plan and shots it began with, then makes
    the hourly plan: the order of a night not killed (the plan is looked at before a check is
    waited for, never inside one). Cut after the first acquisition of the last check before an
    hourly plan; the resumed journal files no acquisition twice (journal_checks) and makes no
    plan between the cut and the check's hold record."""
    source = night["base"] / "night"
    records = night["records"]
    hourly = next(i for i, r in enumerate(records) if r["type"] == "decision"
                  and r["what"] == "plan" and r["reason"].startswith("an hour of rig time"))
    opened = max(i for i, r in enumerate(records[:hourly]) if r["type"] == "measurement"
                 and r["label"] == "hold")
    point = records[opened]["point"]
    index = next(i for i in range(opened, hourly) if records[i]["type"] == "acquisition")
    run = tmp_path / "inside-check"
    shutil.copytree(source, run)
    lines = (source / JOURNAL_NAME).read_bytes().splitlines(keepends=True)
    (run / JOURNAL_NAME).write_bytes(b"".join(lines[: index + 1]))
    (run / RESULT_NAME).unlink()
    store = tmp_path / "good.json"
    shutil.copy(night["store"], store)
    result = track.track(night["rig"], night["config"], run, resume=True, store=store)
    after = read_journal(run / JOURNAL_NAME)
    check_invariants(after)
    assert after[: index + 1] == records[: index + 1]
    held = [i for i, r in enumerate(after) if i > index and r["type"] == "hold"]
    assert held and after[held[0]]["point"] == point, "the check cut in flight never finished"
    held = held[0]
    assert any(r["type"] == "estimate" and r["label"] == "hold" and r["point"] == point
               for r in after[index + 1:held])
    assert not [r for r in after[index + 1:held]
                if r["type"] == "decision" and r["what"] == "plan"], "planned inside the check"
    assert result["status"] == "ended"
