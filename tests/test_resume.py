"""Resume from every record: a finished run's journal cut after each record kind (and in the
middle of a line) resumes and finishes its stage with the journal's invariants intact.

The cut journals stand for a process killed at that moment (SIGKILL leaves exactly such a
file: complete records up to the cut, perhaps a partial last line). The rig has moved on since
(its clock, its set-points), as a real one would have. The practices checked are write-ahead
logging and at-least-once delivery with idempotent receivers (tests/journal_checks.py).
Real processes and signals are in tests/test_survival.py; this matrix runs in process so that
every record kind of both stage commands fits in the default suite.
"""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path
from typing import Any

import pytest

from autotune.run import preflight, runner
from autotune.config import RunConfig, load_config
from autotune.errors import ConfigErrors
from autotune.run.journal import JOURNAL_NAME, RESULT_NAME, read_journal, read_json
from drivers_sim.config import load_sim_config
from autotune.kit.server import LocalRig
from drivers_sim.driver import SimulatedDriver
from drivers_sim.rig import SimulatedRig
from journal_checks import check_invariants
from rig_process import REPO

DRY_RUN = REPO / "configs" / "dry-run.toml"
SIM = REPO / "configs" / "sim-rig.toml"


def small_config() -> RunConfig:
    """The dry-run settings at tiny sizes: 4 points, 3 phases, a 3-point final scan; the
    shortfall bound does not gate acceptance (4 points cannot vouch for 2 %: these tests are of
    the resume's mechanics, and the retune needs a stored calibration)."""
    config = load_config(DRY_RUN)
    return dataclasses.replace(
        config,
        max_shortfall=1.0,
        measurement=dataclasses.replace(config.measurement, shots_per_phase=300, ramsey_phases=3,
                                        verification_shots_per_phase=600, resamples=200),
        search=dataclasses.replace(config.search, max_points=4, min_points=4, n_initial_points=3,
                                   refine_points=3),
        lock=dataclasses.replace(config.lock, lock_shots_per_phase=300,
                                 velocity_shots_per_phase=300),
        retune=dataclasses.replace(config.retune, max_points=2, n_initial_points=1,
                                   check_shots_per_phase=600, still_good_fraction=1.0),
    )


def _cuts(records: list[dict[str, Any]], *, complete: bool) -> list[tuple[str, int, bool]]:
    """Cut positions (kind, index, partial next line): after the first record of every kind
    (and of every decision), alternating whole and partial cuts; ``complete`` adds the last
    record of every kind and both cut styles everywhere."""
    names: dict[str, list[int]] = {}
    for index, rec in enumerate(records[:-1]):  # cutting after the end record leaves a finished run
        name = rec["type"] if rec["type"] != "decision" else f"decision:{rec['what']}"
        names.setdefault(name, []).append(index)
    cuts = set()
    for number, (name, indices) in enumerate(sorted(names.items(), key=lambda kv: kv[1][0])):
        if complete:
            for index in {indices[0], indices[-1]}:
                cuts |= {(name, index, False), (name, index, True)}
        else:
            cuts.add((name, indices[0], bool(number % 2)))
    return sorted(cuts, key=lambda c: (c[1], c[2]))


def _cut_copy(source: Path, target: Path, keep: int, partial: bool) -> None:
    """Copy a run folder keeping ``keep`` complete records (plus half of the next line)."""
    shutil.copytree(source, target)
    lines = (source / JOURNAL_NAME).read_bytes().splitlines(keepends=True)
    data = b"".join(lines[:keep])
    if partial:
        data += lines[keep][: len(lines[keep]) // 2]
    (target / JOURNAL_NAME).write_bytes(data)
    (target / RESULT_NAME).unlink(missing_ok=True)


#: The tests of each strategy share its expensive module-scoped fixture: one worker runs them
#: (pytest-xdist's loadgroup), so that it is built once per strategy; the two strategies' tests
#: run on two workers side by side (the bayesian cut matrix alone is minutes of GP fits).
_STRATEGIES = [pytest.param(name, marks=pytest.mark.xdist_group(f"test_resume_{name}"))
               for name in ("phase_lock", "bayesian")]


@pytest.fixture(scope="module", params=_STRATEGIES)
def finished_runs(request: pytest.FixtureRequest,
                  tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """One finished calibration and one retune that did not stop at its check, on one
    simulated rig, with the phase lock (the default) and with the Gaussian-process search."""
    base = tmp_path_factory.mktemp("finished")
    rig = LocalRig(SimulatedDriver(SimulatedRig(load_sim_config(SIM), 41)))
    config = small_config()
    config = dataclasses.replace(config, search=dataclasses.replace(config.search,
                                                                    strategy=request.param))
    store = base / "good.json"
    runner.calibrate(rig, config, base / "calibrate", store=store)
    rig.thermal_step(15e3)
    runner.retune(rig, config, base / "retune", store=store)
    return {"rig": rig, "config": config, "base": base, "store": store}


def _resume_matrix(finished_runs: dict[str, Any], tmp_path: Path, command: str,
                   complete: bool) -> None:
    source = finished_runs["base"] / command
    records = read_journal(source / JOURNAL_NAME)
    assert records[-1]["status"] in ("accepted", "below_acceptance")
    stage = runner.calibrate if command == "calibrate" else runner.retune
    cuts = _cuts(records, complete=complete)
    kinds = {name.split(":")[0] for name, _, _ in cuts}
    assert {"stage", "proposal", "measurement", "request", "acquisition", "estimate",
            "move", "decision"} <= kinds
    for number, (name, index, partial) in enumerate(cuts):
        run = tmp_path / f"{number}-{name.replace(':', '-')}-{int(partial)}"
        _cut_copy(source, run, index + 1, partial)
        store = tmp_path / f"good-{number}.json"
        shutil.copy(finished_runs["store"], store)
        result = stage(finished_runs["rig"], finished_runs["config"], run, resume=True,
                       store=store)
        after = read_journal(run / JOURNAL_NAME)
        check_invariants(after)
        # Nothing of the cut journal was lost or rewritten.
        assert after[: index + 1] == records[: index + 1], f"cut after {name}"
        assert read_json(run / RESULT_NAME)["status"] == result["status"]
        if partial:
            assert (run / (JOURNAL_NAME + ".partial")).exists()


@pytest.mark.parametrize("command", ["calibrate", "retune"])
def test_a_run_cut_after_any_record_kind_resumes_and_finishes(finished_runs, tmp_path, command):
    """Cut after the first record of every kind (whole, or with half of the next line), the stage
    resumes, finishes, measures nothing twice and re-tells each finished point once."""
    _resume_matrix(finished_runs, tmp_path, command, complete=False)


@pytest.mark.slow
@pytest.mark.parametrize("command", ["calibrate", "retune"])
def test_every_cut_of_the_matrix_resumes_and_finishes(finished_runs, tmp_path, command):
    """The complete matrix: after the first and the last record of every kind, each cut whole
    and in the middle of the next line."""
    _resume_matrix(finished_runs, tmp_path, command, complete=True)


def test_a_resumed_run_can_be_resumed_again(finished_runs, tmp_path):
    """A run cut, resumed, and cut again in its resumed part finishes on the second resume."""
    source = finished_runs["base"] / "calibrate"
    records = read_journal(source / JOURNAL_NAME)
    first = next(i for i, r in enumerate(records) if r["type"] == "estimate")
    run = tmp_path / "twice"
    _cut_copy(source, run, first + 1, partial=False)
    store = tmp_path / "good.json"
    runner.calibrate(finished_runs["rig"], finished_runs["config"], run, resume=True, store=store)
    resumed = read_journal(run / JOURNAL_NAME)
    again = next(i for i, r in enumerate(resumed) if i > first + 1 and r["type"] == "acquisition")
    (run / JOURNAL_NAME).write_bytes(b"".join(
        (run / JOURNAL_NAME).read_bytes().splitlines(keepends=True)[: again + 1]))
    runner.calibrate(finished_runs["rig"], finished_runs["config"], run, resume=True, store=store)
    final = read_journal(run / JOURNAL_NAME)
    check_invariants(final)
    assert sum(1 for r in final if r["type"] == "decision" and r["what"] == "resume") == 2


def test_resume_takes_new_budgets_and_shots_of_measurements_not_started(finished_runs, tmp_path):
    """A resume with a larger point budget and other verification shots continues with them,
    and says so in the journal; a measurement already started keeps its shots."""
    source = finished_runs["base"] / "calibrate"
    records = read_journal(source / JOURNAL_NAME)
    cut = next(i for i, r in enumerate(records) if r["type"] == "estimate")
    run = tmp_path / "changed"
    _cut_copy(source, run, cut + 1, partial=False)
    config = finished_runs["config"]
    raw = {**config.raw, "search": {**config.raw["search"], "max_points": 5, "min_points": 5},
           "measurement": {**config.raw["measurement"], "verification_shots_per_phase": 700}}
    changed = dataclasses.replace(
        config, raw=raw,
        search=dataclasses.replace(config.search, max_points=5, min_points=5),
        measurement=dataclasses.replace(config.measurement, verification_shots_per_phase=700))
    result = runner.calibrate(finished_runs["rig"], changed, run, resume=True,
                              store=tmp_path / "good.json")
    after = read_journal(run / JOURNAL_NAME)
    check_invariants(after)
    assert result["points"] == 5
    # The phase lock measures its verification in two halves of 350 (the second when the first
    # does not settle the stage); the Gaussian-process search in one.
    verify = [r for r in after if r["type"] == "acquisition" and r["label"] == "verify"]
    halves = config.search.strategy == "phase_lock"
    assert {r["shots"] for r in verify} == ({350} if halves else {700})
    note = next(r for r in after if r["type"] == "decision" and r["what"] == "config_changed")
    assert {c["key"] for c in note["changes"]} >= {"search.max_points",
                                                   "measurement.verification_shots_per_phase"}


def test_resume_refuses_a_change_that_alters_what_was_measured(finished_runs, tmp_path):
    """A resume with another seed or Ramsey phase count is refused, naming each key and both
    values, before anything is sent or written."""
    source = finished_runs["base"] / "calibrate"
    run = tmp_path / "refused"
    _cut_copy(source, run, 5, partial=False)
    before = (run / JOURNAL_NAME).read_bytes()
    config = finished_runs["config"]
    raw = {**config.raw, "search": {**config.raw["search"], "seed": 7},
           "measurement": {**config.raw["measurement"], "ramsey_phases": 4}}
    changed = dataclasses.replace(config, raw=raw)
    shots = finished_runs["rig"].status().shots_total
    with pytest.raises(ConfigErrors) as info:
        runner.calibrate(finished_runs["rig"], changed, run, resume=True,
                         store=tmp_path / "good.json")
    keys = {p.key for p in info.value.problems}
    assert {"search.seed", "measurement.ramsey_phases"} <= keys
    assert "20261201" in str(info.value) and "7" in str(info.value)
    assert (run / JOURNAL_NAME).read_bytes() == before
    assert finished_runs["rig"].status().shots_total == shots


def test_a_run_started_with_a_box_narrower_than_the_lock_step_still_resumes(tmp_path, monkeypatch):
    """A detuning box narrower than a tenth of [lock] bracket_step_hz is refused for a new run,
    but a run that started with one (before that check existed; the lock halves its step to fit
    the box) resumes: on a resume neither the box nor the step may change, so refusing it would
    leave the run with no way to continue."""
    config = small_config()
    box = next(sp for sp in config.setpoints if sp.name == "detuning")
    narrow = dataclasses.replace(box, search_min=-400.0, search_max=400.0)
    config = dataclasses.replace(config, setpoints=tuple(
        narrow if sp.name == "detuning" else sp for sp in config.setpoints))
    assert narrow.search_max - narrow.search_min < 0.1 * config.lock.bracket_step_hz
    rig = LocalRig(SimulatedDriver(SimulatedRig(load_sim_config(SIM), 43)))
    with pytest.raises(ConfigErrors, match="at least a tenth of the lock's first step wide"):
        runner.calibrate(rig, config, tmp_path / "new", store=tmp_path / "good.json")
    with monkeypatch.context() as patch:  # as the version before the check started it
        patch.setattr(preflight, "_box_problems", lambda config: [])
        runner.calibrate(rig, config, tmp_path / "old", store=tmp_path / "good.json")
    records = read_journal(tmp_path / "old" / JOURNAL_NAME)
    keep = next(i for i, rec in enumerate(records) if rec["type"] == "estimate") + 1
    _cut_copy(tmp_path / "old", tmp_path / "cut", keep, partial=False)
    result = runner.calibrate(rig, config, tmp_path / "cut", resume=True,
                              store=tmp_path / "good.json")
    assert read_json(tmp_path / "cut" / RESULT_NAME)["status"] == result["status"]
    check_invariants(read_journal(tmp_path / "cut" / JOURNAL_NAME))
