"""Tests of the closed loop on the simulated rig, in process (the protocol without a socket).

The bus itself is exercised in tests/bus and, end to end, in tests/test_cli.py; here the
simulated rig's noiseless truth is the outside reference for what the loop measures and chooses.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from autotune.run import runner
from autotune.config import RunConfig, load_config
from autotune.errors import LimitError, RigRefused
from autotune.run.journal import JOURNAL_NAME, Journal, read_journal, write_json_atomic
from autotune.run.loop import Session, Measurement
from autotune.wire.protocol import Applied, Description, SetpointLimit, Status
from autotune.kit.server import LocalRig
from drivers_sim.config import load_sim_config, sim_config_from_dict
from drivers_sim.driver import SimulatedDriver
from drivers_sim.rig import SimulatedRig
from rig_process import REPO

DRY_RUN = REPO / "configs" / "dry-run.toml"
SIM = REPO / "configs" / "sim-rig.toml"


def _config(**search: Any) -> RunConfig:
    config = load_config(DRY_RUN)
    return dataclasses.replace(config, search=dataclasses.replace(config.search, **search))


def _sim(seed: int, *, drift: bool = True) -> LocalRig:
    config = load_sim_config(SIM)
    if not drift:
        data = config.to_dict()
        data["drift"]["ramp_hz_per_s"] = 0.0
        data["drift"]["random_walk_hz_per_sqrt_s"] = 0.0
        config = sim_config_from_dict(data)
    return LocalRig(SimulatedDriver(SimulatedRig(config, seed)))


_OPEN: list[Journal] = []


@pytest.fixture(autouse=True)
def _close_journals() -> Any:
    yield
    while _OPEN:
        _OPEN.pop().close()


def _session(rig: LocalRig, tmp_path: Path, config: RunConfig | None = None,
             sleep: Any = lambda s: None) -> Session:
    config = config or _config()
    journal = Journal.create(tmp_path / "run", {"command": "test"})
    _OPEN.append(journal)
    session = Session(rig, config, journal, rig.describe(), sleep=sleep)
    session.learn_present()
    return session


def test_interval_covers_the_truth_at_its_stated_rate(tmp_path: Path) -> None:
    """Over 100 seeded measurements at three settings the 95% interval covers the true inversion >= 90%.

    Reference: the simulated rig's noiseless truth (docs/physics.md s.5: "a correct interval must
    cover the truth at its stated rate on the simulated rig").
    """
    settings_list = [{"velocity": 517.0, "detuning": -3e3},   # near the optimum
                     {"velocity": 440.0, "detuning": -25e3},  # slow atoms, detuned ridge side
                     {"velocity": 560.0, "detuning": 20e3}]   # far from the optimum
    # Without drift the truth does not depend on the rig's seed (which drives only the counts).
    reference = _sim(0, drift=False)
    truths = [reference.truth(target)["inversion"] for target in settings_list]
    covered = total = 0
    for seed in range(100):
        rig = _sim(seed, drift=False)
        session = _session(rig, tmp_path / str(seed))
        target = settings_list[seed % 3]
        m = Measurement("verify", 0, target, session.config.measurement.shots_per_phase * 2)
        estimate = session.measure(m, seed=seed)
        truth = truths[seed % 3]
        covered += estimate.inversion_low <= truth <= estimate.inversion_high
        total += 1
        assert math.isfinite(estimate.inversion_stderr)
        session.journal.close()
    assert covered / total >= 0.90


def test_every_acquisition_is_journaled_before_the_next(tmp_path: Path) -> None:
    """A measurement leaves one acquisition record per field and phase, with the rig's own counts."""
    rig = _sim(3)
    session = _session(rig, tmp_path)
    before = rig.status().shots_total
    m = Measurement("point", 0, {"velocity": 510.0, "detuning": 0.0}, 200)
    session.measure(m, seed=1)
    records = read_journal(session.journal.path)
    acquisitions = [r for r in records if r["type"] == "acquisition"]
    phases = session.config.measurement.ramsey_phases
    assert len(acquisitions) == 2 * phases
    assert {(r["field"], r["phase_index"]) for r in acquisitions} == {
        (f, j) for f in ("empty", "one_photon") for j in range(phases)}
    # The rig's shot counter (outside the loop's own tally) agrees with what was journaled.
    assert rig.status().shots_total - before == sum(r["shots"] for r in acquisitions)
    assert records[-1]["type"] == "estimate"


def test_interlock_pauses_and_the_run_goes_on(tmp_path: Path) -> None:
    """An interlock set during a measurement pauses the loop; once cleared, the measurement finishes."""
    rig = _sim(4)
    polls = []

    def sleep(seconds: float) -> None:
        polls.append(seconds)
        if len(polls) == 3:
            rig.sim.set_interlock(None)

    session = _session(rig, tmp_path, sleep=sleep)
    rig.sim.set_interlock("cryostat pressure")
    estimate = session.measure(Measurement("point", 0, {"velocity": 510.0, "detuning": 0.0}, 100),
                               seed=1)
    assert math.isfinite(estimate.inversion)
    decisions = [r["what"] for r in read_journal(session.journal.path) if r["type"] == "decision"]
    assert decisions[:2] == ["pause", "resume"]


def test_interlock_that_stays_set_ends_the_run_at_safe_setpoints(tmp_path: Path) -> None:
    """Past the interlock bound the stage fails, the rig is at its safe set-points, the journal closed."""
    rig = _sim(5)
    config = _config(max_points=3)
    config = dataclasses.replace(config, recovery=dataclasses.replace(
        config.recovery, interlock_poll_s=1.0, interlock_max_wait_s=3.0))
    rig.sim.set_interlock("door open")
    with pytest.raises(RigRefused, match="interlock"):
        runner.calibrate(rig, config, tmp_path / "run", store=tmp_path / "good.json")
    records = read_journal(tmp_path / "run" / JOURNAL_NAME)
    assert records[-1] == {**records[-1], "type": "end", "status": "aborted"}
    assert any(r["type"] == "safe" for r in records)
    assert rig.status().setpoints == rig.describe().safe_setpoints
    assert not (tmp_path / "good.json").exists()


def test_phase_lock_retune_of_a_still_rig_stays_put_or_stays_good(tmp_path: Path) -> None:
    """Right after a phase-lock calibration on a drift-free rig, the retune's check either keeps
    the setting (no search point, nothing moved, the store unchanged) or corrects it; either way
    it ends within 2 % of the true best (reference: the simulator's noiseless truth)."""
    rig = _sim(6, drift=False)
    store = tmp_path / "good.json"
    runner.calibrate(rig, _config(), tmp_path / "calibrate", store=store)
    stored = store.read_bytes()
    before = dict(rig.status().setpoints)
    result = runner.retune(rig, _config(), tmp_path / "run", store=store)
    truth = rig.truth(result["setpoints"])
    assert truth["inversion"] >= 0.98 * truth["best"]["inversion"]
    assert result["status"] in ("still_good", "accepted")
    if result["status"] == "still_good":
        assert result["points"] == 0
        assert result["setpoints"] == pytest.approx(before)
        assert store.read_bytes() == stored
    else:
        assert "lock_prior" in json.loads(store.read_text())


def _stepped_once(rig: LocalRig, shift_hz: float) -> Any:
    """An observer that steps the cavity once, right after the search has converged (so the
    verification measures a moved peak)."""
    stepped: list[int] = []

    def observer(points: int, strategy: Any, session: Any) -> None:
        if not stepped and strategy.converged(clock_s=session.clock):
            rig.thermal_step(shift_hz)
            stepped.append(points)

    return observer


def test_a_verification_that_misses_the_bar_sends_the_search_on(tmp_path: Path) -> None:
    """A cavity step of +8 kHz between the search's stop and its verification (no corrections
    allowed) leaves the verified choice below the acceptance bar; the stage searches on within
    its budget and verifies again, instead of being judged on the first verification. The
    second verified choice is nearer the true best than the first, and the stage's verdict is
    honest: accepted within 2 % of the true best, or refused with a stated 95 % bound that covers
    the true shortfall (since session 9's velocity model this draw ends refused at 0.986 of the
    best with a bound of 2.08 %, its expected bound after a second half 2.01 %, just above the
    bar).

    References: docs/physics.md section 5b (the phase shift moves by about 0.09 pi per 3 kHz near
    the peak, so 8 kHz is a phase error near 0.24 pi, a shortfall 1 - cos(eps / 2) near 7 %
    from section 3's Ramsey formula, far above the 2 % bar); the simulator's noiseless truth.
    """
    rig = _sim(5, drift=False)
    config = _config()
    config = dataclasses.replace(config, lock=dataclasses.replace(config.lock, max_corrections=0))
    result = runner.calibrate(rig, config, tmp_path / "run", store=tmp_path / "good.json",
                              observer=_stepped_once(rig, 8e3))
    records = read_journal(tmp_path / "run" / JOURNAL_NAME)
    verifications = [r for r in records if r["type"] == "estimate" and r["label"] == "verify"]
    again = [r for r in records if r["type"] == "decision" and r["what"] == "search_again"]
    assert len(again) == 1
    assert "misses the acceptance bar 2.0%" in again[0]["reason"]
    # A verification before the search went on and one after it (each its first half, and its
    # second where the first did not settle the stage); search steps lie between the two.
    assert verifications[0]["seq"] < again[0]["seq"] < verifications[-1]["seq"]
    searched = [r for r in records if r["type"] == "estimate" and r["label"] in ("lock", "relock", "velocity")
                and again[0]["seq"] < r["seq"] < verifications[-1]["seq"]]
    assert searched
    # The first verified choice really was off (the truth at its set-points, now).
    first = rig.truth(verifications[0]["setpoints"])
    assert first["inversion"] < 0.98 * first["best"]["inversion"]
    truth = rig.truth(verifications[-1]["setpoints"])
    assert truth["inversion"] > first["inversion"]
    ratio = truth["inversion"] / truth["best"]["inversion"]
    if result["accepted"]:
        assert ratio >= 0.98
    else:
        assert 1.0 - ratio <= result["predicted_shortfall"]["upper"]
        assert "bound" in result["reason"] and "\n" not in result["reason"]


def test_a_verification_that_moves_the_recommendation_is_followed_by_one_there(tmp_path: Path) -> None:
    """A verification is data: told to the lock, it can move the lock's recommendation while the
    verified choice's own bound, every result told, misses the 2 % bar. The stage then verifies
    the recommendation in its place (decision search_again, no search step between the two
    verifications) instead of refusing a setting its lock no longer recommends.

    The rig is the calibration study's main scenario 4 (benchmarks/results/calibration.json),
    where this happened at commit bd9f16f: its first verification, at 8.3 kHz, moved the lock's
    peak to 5.7 kHz, and the stage was refused at 0.993 of the true best. Reference: the
    simulator's noiseless truth.
    """
    from autotune.bench import plan as bench_plan
    from autotune.bench import scenarios as bench_scenarios

    plan = dataclasses.replace(bench_plan.plan_for("full", workers=1, scenarios=8, strategies=("phase_lock",)),
                               families=("main",), night_steps=0, overhead_points=(), night_study=False)
    config = bench_plan.strategy_configs(bench_plan.base_config(plan, bench_plan.DEFAULT_RUN_CONFIG),
                                         plan)["phase_lock"]
    scenario = next(s for s in bench_plan.family_scenarios(plan)["main"] if s["index"] == 4)
    config = dataclasses.replace(config, search=dataclasses.replace(config.search, seed=scenario["search_seed"]))
    rig = bench_scenarios.local_rig(bench_scenarios.rig_data(bench_plan.DEFAULT_RIG_CONFIG),
                                    scenario["perturbation"], scenario["rig_seed"])
    result = runner.calibrate(rig, config, tmp_path / "run", store=tmp_path / "good.json")
    records = read_journal(tmp_path / "run" / JOURNAL_NAME)
    again = [r for r in records if r["type"] == "decision" and r["what"] == "search_again"]
    assert len(again) == 1 and "moved its recommendation" in again[0]["reason"]
    verified = [r for r in records if r["type"] == "estimate" and r["label"] == "verify"]
    before = [r for r in verified if r["seq"] < again[0]["seq"]]
    after = [r for r in verified if r["seq"] > again[0]["seq"]]
    assert before and after and before[-1]["setpoints"] != after[0]["setpoints"]
    assert not [r for r in records if r["type"] == "estimate" and r["label"] not in ("verify", "correct")
                and before[-1]["seq"] < r["seq"] < after[0]["seq"]]
    assert result["accepted"] and result["setpoints"] == after[-1]["setpoints"]
    truth = rig.truth(result["setpoints"])
    assert truth["inversion"] >= 0.98 * truth["best"]["inversion"]


def test_a_verification_that_misses_the_bar_is_rejected_when_the_budget_is_spent(tmp_path: Path) -> None:
    """The same step after the search's last budgeted point: no search again, the stage is not
    accepted, says why in one line (the bound above the bar) and leaves the store untouched."""
    rig = _sim(5, drift=False)
    config = _config(max_points=6)
    config = dataclasses.replace(config, lock=dataclasses.replace(config.lock, max_corrections=0))

    def observer(points: int, strategy: Any, session: Any) -> None:
        if points == 6:
            rig.thermal_step(8e3)

    store = tmp_path / "good.json"
    result = runner.calibrate(rig, config, tmp_path / "run", store=store, observer=observer)
    records = read_journal(tmp_path / "run" / JOURNAL_NAME)
    assert result["points"] == 6
    assert not [r for r in records if r["type"] == "decision" and r["what"] == "search_again"]
    assert not result["accepted"] and not store.exists()
    assert "bound" in result["reason"] and "\n" not in result["reason"]


def test_retune_without_drift_stops_after_its_check(tmp_path: Path) -> None:
    """With the Gaussian-process search: at the true best of a drift-free rig, retune measures
    once, says still good, moves nothing."""
    rig = _sim(6, drift=False)
    best = rig.truth()["best"]
    store = tmp_path / "good.json"
    write_json_atomic(store, {"setpoints": best["setpoints"], "inversion": best["inversion"]})
    stored = store.read_bytes()
    result = runner.retune(rig, _config(strategy="bayesian"), tmp_path / "run", store=store)
    assert result["status"] == "still_good"
    assert result["points"] == 0
    assert result["setpoints"] == best["setpoints"]
    assert rig.status().setpoints == pytest.approx(best["setpoints"])
    # The store is not rewritten by a check that passed.
    assert store.read_bytes() == stored


class _RecordingRig:
    """A rig that records every apply (the guard's outside observer); limits as described."""

    def __init__(self, limits: dict[str, SetpointLimit], present: dict[str, float]) -> None:
        self.limits = limits
        self.present = dict(present)
        self.applied: list[dict[str, float]] = []

    def describe(self) -> Description:
        return Description(rig="recorder", proto=1, simulated=True, setpoints=self.limits,
                           fields=("empty", "one_photon"), repetition_rate_hz=150.0,
                           safe_setpoints=dict(self.present))

    def status(self) -> Status:
        return Status(clock=0.0, busy=False, interlock=None, setpoints=dict(self.present),
                      shots_total=0)

    def apply(self, setpoints: dict[str, float], *, msg_id: str | None = None) -> Applied:
        self.applied.append(dict(setpoints))
        self.present.update(setpoints)
        return Applied(setpoints=dict(self.present), clock=0.0)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_out_of_range_proposals_never_reach_the_rig(tmp_path_factory: pytest.TempPathFactory,
                                                    data: st.DataObject) -> None:
    """For random boxes, steps and targets, every applied value is in limits and within max_step."""
    config = load_config(DRY_RUN)
    limits = {}
    present = {}
    setpoints = []
    for sp in config.setpoints:
        lo = data.draw(st.floats(sp.limit_min, sp.limit_max - 1.0))
        hi = data.draw(st.floats(lo + 0.5, sp.limit_max))
        step = data.draw(st.floats(1e-3 * (hi - lo), hi - lo))
        limits[sp.name] = SetpointLimit(unit=sp.unit, min=lo, max=hi, max_step=step)
        present[sp.name] = data.draw(st.floats(lo, hi))
        setpoints.append(dataclasses.replace(sp, search_min=lo, search_max=hi))
    config = dataclasses.replace(config, setpoints=tuple(setpoints))
    rig = _RecordingRig(limits, present)
    journal = Journal.create(tmp_path_factory.mktemp("guard") / "run", {})
    session = Session(rig, config, journal, rig.describe())
    try:
        _moves(session, rig, limits, data)
    finally:
        journal.close()
    previous = dict(present)
    for applied in rig.applied:
        for name, value in applied.items():
            lim = limits[name]
            assert lim.min <= value <= lim.max
            assert abs(value - previous[name]) <= lim.max_step * (1 + 1e-9)
            previous[name] = value


def _moves(session: Session, rig: _RecordingRig, limits: dict[str, SetpointLimit],
           data: st.DataObject) -> None:
    for _ in range(3):
        target = {name: data.draw(st.floats(lim.min - (lim.max - lim.min), lim.max + (lim.max - lim.min)))
                  for name, lim in limits.items()}
        before = len(rig.applied)
        try:
            session.move_to(target, reason="property test")
        except LimitError:
            assert len(rig.applied) == before  # refused before anything moved


def test_the_verification_stops_at_its_first_half_only_when_that_settles_the_stage(tmp_path: Path) -> None:
    """The verification is measured in two halves at the same set-points. On the demo rig the
    first half settles the stage (its inversion far above [acceptance] min_inversion 0.5, the
    bound within the bar): one half is measured. With the threshold at that first half's own
    inversion less 1.9 of its standard errors (inside the 1.96 the first half must clear, so it
    does not settle; not above what the rig can reach, so the search's own check of the best
    inversion against the threshold does not end the stage before it verifies) the second half
    is measured and the verified inversion is both halves' counts estimated as one: its
    standard error is the first half's over about sqrt(2) (binomial counting statistics,
    common practice)."""
    rig = _sim(3, drift=False)
    config = _config()
    verify_shots = config.measurement.verification_shots_per_phase
    result = runner.calibrate(rig, config, tmp_path / "one", store=tmp_path / "good.json")
    records = read_journal(tmp_path / "one" / JOURNAL_NAME)
    halves = [r for r in records if r["type"] == "measurement" and r["label"] == "verify"]
    assert [r["shots_per_phase"] for r in halves] == [verify_shots // 2]
    settles = [r for r in records if r["type"] == "decision" and r["what"] == "verify_first_half_settles"]
    assert result["accepted"] and len(settles) == 1 and "min_inversion 0.500" in settles[0]["reason"]

    # The same rig and search, with the threshold just inside the first half's 1.96 margin.
    rig = _sim(3, drift=False)
    threshold = result["inversion"] - 1.9 * result["inversion_stderr"]
    config = dataclasses.replace(_config(), min_inversion=round(threshold, 6))
    result = runner.calibrate(rig, config, tmp_path / "two", store=tmp_path / "good2.json")
    records = read_journal(tmp_path / "two" / JOURNAL_NAME)
    halves = [r for r in records if r["type"] == "estimate" and r["label"] == "verify"]
    assert len(halves) == 2 and halves[0]["setpoints"] == halves[1]["setpoints"]
    assert any(r["type"] == "decision" and r["what"] == "verify_second_half" for r in records)
    first = halves[0]["estimate"]["inversion_stderr"]
    assert result["inversion_stderr"] == pytest.approx(first / math.sqrt(2.0), rel=0.25)
    low = min(h["estimate"]["inversion"] for h in halves)
    high = max(h["estimate"]["inversion"] for h in halves)
    assert low - 1e-9 <= result["inversion"] <= high + 1e-9


def test_a_session_that_lost_its_setpoints_moves_before_it_measures(tmp_path: Path) -> None:
    """After a failed move or a mismatch the session forgets what is in force (``current``
    empty); the next acquisition must move to its set-points rather than assume it is there."""
    # Source: common practice (a controller re-sends a set-point whose state it cannot vouch
    # for); the rig's own reply names the set-points it measured at.
    rig = _sim(3, drift=False)
    session = _session(rig, tmp_path)
    target = {"velocity": 505.0, "detuning": 2000.0}
    session.move_to(target, reason="first")
    session.current = {}                        # as after a failed move or a mismatch
    rig.apply({"velocity": 500.0, "detuning": 0.0})   # the rig elsewhere, unknown to us
    session.ensure_at(target, reason="again")
    assert session.current == pytest.approx(target)
    assert rig.status().setpoints == pytest.approx(target)
    session.current = dict(target)
    moves = len([r for r in read_journal(session.journal.path) if r["type"] == "move"])
    session.ensure_at(target, reason="already there")
    assert len([r for r in read_journal(session.journal.path) if r["type"] == "move"]) == moves
