"""The journal's invariants, checked on real run folders by the resume and fault tests.

The invariants follow two practices of durable systems: write-ahead logging (a request is on
disk before it is sent, its outcome after it returns, so a crash at any point leaves a log
that says what may have happened; common practice) and at-least-once delivery with idempotent
receivers (a request that may have been lost is sent again with the same id, and the receiver
answers a repeated id from its record instead of acting twice; common practice).

A night of ``autotune track`` holds several stages in one journal: each stage's measurements
are numbered from 0 again, so measurements are told apart by their scope (a ``stage`` record
opens one, the night's ``stage_done`` decision closes it); the night's own checks (label
``hold``) are numbered through the night.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any

FINAL = {"accepted", "below_acceptance", "still_good", "ended", "gave_up"}
GUIDED = {"search", "lock", "velocity", "relock", "check", "correct", "verify"}
HOLD = "hold"


def _scoped(scope: int, label: str, point: int) -> tuple[Any, str, int]:
    return ("night" if label == HOLD else scope, label, point)


def check_invariants(records: Sequence[Mapping[str, Any]], *, finished: bool = True) -> None:
    """Assert the journal invariants of one run folder's records.

    - ``seq`` runs 0, 1, 2, ... without gaps;
    - every acquisition belongs to a measurement opened before it, and was taken at that
      measurement's set-points (a mismatched reply is never filed as data);
    - no acquisition (label, point, field, phase) is filed twice: nothing was measured twice;
    - every write-ahead request is resolved by an acquisition, a discarded or a refused record
      carrying its msg_id (in a finished run), and no msg_id is resolved twice;
    - every move written ahead (a request of op ``apply``) is resolved by one ``move`` or
      ``move_unconfirmed`` record carrying its msg_id, after it (in a finished run), and a
      ``move`` resolving it was applied at the step's set-points; every ``safe`` written ahead
      is resolved by one ``safe`` or ``safe_failed`` record with its msg_id;
    - every measurement has at most one estimate, after all of its acquisitions;
    - each resume re-told every search point estimated before it exactly once;
    - a night (``autotune track``): see :func:`check_night`;
    - a finished run ends with a final status.
    """
    assert [r["seq"] for r in records] == list(range(len(records))), "seq has gaps"
    opened: dict[tuple[Any, str, int], Mapping[str, Any]] = {}
    filed: Counter[tuple[Any, str, int, str, int]] = Counter()
    requests: dict[str, Mapping[str, Any]] = {}
    resolved: Counter[str] = Counter()
    moves_ahead: dict[str, Mapping[str, Any]] = {}
    moves_resolved: Counter[str] = Counter()
    estimated: Counter[tuple[Any, str, int]] = Counter()
    point_estimates: list[int] = []
    steps: list[int] = []
    scope = 0
    for rec in records:
        kind = rec["type"]
        if kind == "stage" or (kind == "decision" and rec["what"] == "stage_done"):
            scope += 1
            point_estimates, steps = [], []
        if kind == "measurement":
            opened.setdefault(_scoped(scope, rec["label"], rec["point"]), rec)
        elif kind == "request" and rec["op"] == "acquire":
            assert rec["msg_id"] not in requests, f"msg_id {rec['msg_id']} requested twice"
            requests[rec["msg_id"]] = rec
        elif kind == "request" and rec["op"] == "apply":
            assert rec["msg_id"] not in moves_ahead, f"move {rec['msg_id']} written ahead twice"
            moves_ahead[rec["msg_id"]] = rec
        elif kind == "request" and rec["op"] == "safe":
            moves_ahead[rec["msg_id"]] = rec
        elif kind in ("safe", "safe_failed") and rec.get("msg_id") in moves_ahead:
            moves_resolved[rec["msg_id"]] += 1
        elif kind in ("move", "move_unconfirmed") and rec.get("msg_id") in moves_ahead:
            moves_resolved[rec["msg_id"]] += 1
            if kind == "move":
                want = moves_ahead[rec["msg_id"]]["setpoints"]
                got = rec["applied"]
                assert all(abs(got[n] - v) <= 1e-9 * max(1.0, abs(v)) for n, v in want.items()), (
                    f"record {rec['seq']}: move resolved at {got}, step {want}")
        elif kind in ("acquisition", "discarded", "refused"):
            key = _scoped(scope, rec["label"], rec["point"])
            assert key in opened, f"record {rec['seq']}: {kind} of a measurement never opened"
            if "msg_id" in rec:
                assert rec["msg_id"] in requests, f"record {rec['seq']}: no request was written ahead"
                resolved[rec["msg_id"]] += 1
            if kind == "acquisition":
                filed[(*key, rec["field"], rec["phase_index"])] += 1
                want = opened[key]["setpoints"]
                got = rec["setpoints"]
                assert all(abs(got[n] - v) <= 1e-9 * max(1.0, abs(v)) for n, v in want.items()), (
                    f"record {rec['seq']}: acquisition filed at {got}, measurement at {want}")
        elif kind == "estimate":
            key = _scoped(scope, rec["label"], rec["point"])
            estimated[key] += 1
            if rec["label"] == "point":
                point_estimates.append(rec["point"])
            elif rec["label"] in GUIDED:
                steps.append(rec["point"])
        elif kind == "decision" and rec["what"] == "resume":
            assert sorted(rec["retold"]) == sorted(set(point_estimates)), (
                f"resume at {rec['seq']} re-told {rec['retold']}, estimated {point_estimates}")
            assert len(rec["retold"]) == len(set(rec["retold"]))
            if "steps" in rec:  # the phase lock re-observes every finished step, in order
                assert rec["steps"] == sorted(steps), (rec["steps"], steps)
    twice = [k for k, n in filed.items() if n > 1]
    assert not twice, f"acquisitions filed twice: {twice}"
    assert all(n == 1 for n in resolved.values()), "a request was resolved twice"
    assert all(n == 1 for n in moves_resolved.values()), "a move was resolved twice"
    assert all(n == 1 for n in estimated.values()), f"estimated twice: {estimated}"
    if any(r["type"] == "hold" or (r["type"] == "decision" and r["what"] == "stage_done")
           for r in records):
        check_night(records, finished=finished)
    if finished:
        unresolved = set(requests) - set(resolved)
        assert not unresolved, f"requests never resolved: {sorted(unresolved)}"
        unsettled = set(moves_ahead) - set(moves_resolved)
        assert not unsettled, f"moves written ahead never resolved: {sorted(unsettled)}"
        assert records[-1]["type"] == "end" and records[-1]["status"] in FINAL, records[-1]


def check_night(records: Sequence[Mapping[str, Any]], *, finished: bool = True) -> None:
    """The invariants of a night of ``autotune track``.

    - every ``hold`` record follows the estimate of its check, once per check, in order, and
      carries its action, reason, numbers and the night's state (statistics >= 0);
    - every correction is a ``correct`` decision with ``from``/``to`` set-points, and the rig is
      at ``to`` (a move reaching it, or the next check filed there) before the next check is
      measured or the night stops;
    - every alarm is followed by a stage (a ``retune`` or ``calibrate`` decision), or by the
      night's stop (its end came first);
    - every stage begun (a ``retune``/``calibrate`` decision with its index) has its records
      and, in a finished night, its ``stage_done``, indices in order, each once;
    - every ``wait`` waits forwards, and is written before the check it waits for;
    - a recheck run is never cut by the hourly plan: between a check whose next is a recheck
      and that recheck, no ``plan`` decision made for the hour (a run's statistics are read
      against the thresholds and shots it began with);
    - no ``plan`` decision between a check's measurement and its ``hold`` record (a check is
      assessed with the plan and shots it began with, a resumed one too);
    - a finished night ends with a ``stop`` decision that says why.
    """
    hold_estimates: dict[int, int] = {}
    holds: list[int] = []
    begun: list[int] = []
    done: list[int] = []
    pending_correction: Mapping[str, Any] | None = None
    alarm_open = False
    recheck_of: int | None = None
    checking: int | None = None
    for position, rec in enumerate(records):
        kind = rec["type"]
        what = rec.get("what")
        if kind == "estimate" and rec["label"] == HOLD:
            hold_estimates[rec["point"]] = position
        elif kind == "measurement" and rec["label"] == HOLD:
            checking = rec["point"]
            if pending_correction is not None:
                # The rig may have applied the correction just before a kill, with no move
                # record: the next check is then opened (and, by the invariant above, filed)
                # at the corrected set-points.
                want = pending_correction["to"]
                assert all(abs(rec["setpoints"][n] - v) <= 1e-6 * max(1.0, abs(v))
                           for n, v in want.items()), (
                    f"record {rec['seq']}: check {rec['point']} measured at {rec['setpoints']} "
                    f"before the correction of check {pending_correction['point']} reached {want}")
                pending_correction = None
        elif kind == "hold":
            point = rec["point"]
            assert point in hold_estimates, f"record {rec['seq']}: hold of a check never estimated"
            assert point not in holds, f"record {rec['seq']}: check {point} assessed twice"
            assert not holds or point > holds[-1], f"record {rec['seq']}: checks out of order"
            holds.append(point)
            checking = None
            assert rec["action"] in ("hold", "correct", "recheck", "alarm") and rec["reason"]
            tests = rec["state"]["tests"]
            assert min(tests["upper"], tests["lower"], tests["inversion"]) >= 0.0
            upcoming = rec["state"].get("next") or {}
            recheck_of = point if upcoming.get("recheck") else None
        elif kind == "decision" and what == "plan" and (recheck_of is not None
                                                        or checking is not None):
            assert checking is None, (f"record {rec['seq']}: a plan made inside check "
                                      f"{checking} (measured, not assessed)")
            assert not rec["reason"].startswith("an hour of rig time"), (
                f"record {rec['seq']}: the hourly plan cut the recheck run after check "
                f"{recheck_of}")
        elif kind == "decision" and what == "correct" and "point" in rec:
            assert set(rec["from"]) == set(rec["to"]), rec
            pending_correction = rec
        elif kind == "move" and pending_correction is not None:
            want = pending_correction["to"]
            if all(abs(rec["applied"].get(n, float("nan")) - v) <= 1e-6 * max(1.0, abs(v))
                   for n, v in want.items()):
                pending_correction = None
        elif kind == "decision" and what == "alarm":
            alarm_open = True
            recheck_of = None
        elif kind == "decision" and what in ("retune", "calibrate") and "index" in rec:
            alarm_open = False
            assert rec["index"] not in begun, f"record {rec['seq']}: stage {rec['index']} begun twice"
            assert not begun or rec["index"] == begun[-1] + 1, "stages out of order"
            begun.append(rec["index"])
        elif kind == "decision" and what == "stage_done":
            assert rec["index"] in begun and rec["index"] not in done, rec
            done.append(rec["index"])
        elif kind == "decision" and what == "stop" and rec.get("status") != "interrupted":
            assert rec["reason"]
            pending_correction = None
            alarm_open = False
        elif kind == "wait":
            assert rec["until_clock"] >= rec["from_clock"], rec
        elif kind == "safe":
            pending_correction = None
    if finished:
        assert not alarm_open, "an alarm without a stage after it"
        assert begun == done, f"stages begun {begun}, finished {done}"
        assert pending_correction is None, f"correction never reached: {pending_correction}"
        assert any(r["type"] == "decision" and r["what"] == "stop"
                   and r.get("status") != "interrupted" for r in records)


def journal_shots(records: Sequence[Mapping[str, Any]]) -> int:
    """Shots the journal accounts for: filed acquisitions plus discarded (mismatched) ones."""
    return sum(int(r["shots"]) for r in records
               if r["type"] == "acquisition" or (r["type"] == "discarded" and r.get("shots")))
