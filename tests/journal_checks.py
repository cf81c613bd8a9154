"""The journal's invariants, checked on real run folders by the resume and fault tests.

The invariants follow two practices of durable systems: write-ahead logging (a request is on
disk before it is sent, its outcome after it returns, so a crash at any point leaves a log
that says what may have happened; common practice) and at-least-once delivery with idempotent
receivers (a request that may have been lost is sent again with the same id, and the receiver
answers a repeated id from its record instead of acting twice; common practice).
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any

FINAL = {"accepted", "below_acceptance", "still_good"}
GUIDED = {"search", "lock", "velocity", "relock", "check", "correct", "verify"}


def check_invariants(records: Sequence[Mapping[str, Any]], *, finished: bool = True) -> None:
    """Assert the journal invariants of one run folder's records.

    - ``seq`` runs 0, 1, 2, ... without gaps;
    - every acquisition belongs to a measurement opened before it, and was taken at that
      measurement's set-points (a mismatched reply is never filed as data);
    - no acquisition (label, point, field, phase) is filed twice: nothing was measured twice;
    - every write-ahead request is resolved by an acquisition, a discarded or a refused record
      carrying its msg_id (in a finished run), and no msg_id is resolved twice;
    - every measurement has at most one estimate, after all of its acquisitions;
    - each resume re-told every search point estimated before it exactly once;
    - a finished run ends with a final status.
    """
    assert [r["seq"] for r in records] == list(range(len(records))), "seq has gaps"
    opened: dict[tuple[str, int], Mapping[str, Any]] = {}
    filed: Counter[tuple[str, int, str, int]] = Counter()
    requests: dict[str, Mapping[str, Any]] = {}
    resolved: Counter[str] = Counter()
    estimated: Counter[tuple[str, int]] = Counter()
    point_estimates: list[int] = []
    steps: list[int] = []
    for rec in records:
        kind = rec["type"]
        if kind == "measurement":
            opened.setdefault((rec["label"], rec["point"]), rec)
        elif kind == "request" and rec["op"] == "acquire":
            assert rec["msg_id"] not in requests, f"msg_id {rec['msg_id']} requested twice"
            requests[rec["msg_id"]] = rec
        elif kind in ("acquisition", "discarded", "refused"):
            key = (rec["label"], rec["point"])
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
            key = (rec["label"], rec["point"])
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
    assert all(n == 1 for n in estimated.values()), f"estimated twice: {estimated}"
    if finished:
        unresolved = set(requests) - set(resolved)
        assert not unresolved, f"requests never resolved: {sorted(unresolved)}"
        assert records[-1]["type"] == "end" and records[-1]["status"] in FINAL, records[-1]


def journal_shots(records: Sequence[Mapping[str, Any]]) -> int:
    """Shots the journal accounts for: filed acquisitions plus discarded (mismatched) ones."""
    return sum(int(r["shots"]) for r in records
               if r["type"] == "acquisition" or (r["type"] == "discarded" and r.get("shots")))
