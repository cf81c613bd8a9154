"""Conformance probe: check a rig server against the wire protocol, op by op.

``autotune probe ENDPOINT`` runs :class:`Probe` and prints one line per rule: ``PASS``,
``FAIL``, ``WARN`` (an optional feature missing) or ``SKIP`` (not run), with what the
protocol expects and, where it differs, what the rig did. The rules, in the order they run:

Rules that do not move the rig

===================== ===========================================================================
describe              ``describe`` answers with the protocol's keys (rig, proto 1, simulated,
                      setpoints, fields, repetition_rate_hz, safe_setpoints)
describe.setpoints    ``velocity`` in m/s and ``detuning`` in Hz are described, with min <= max
                      and max_step > 0
describe.safe         ``safe_setpoints`` names every set-point, within its limits
describe.fields       ``fields`` holds ``empty`` and ``one_photon``
status                ``status`` answers with clock, busy, interlock, setpoints (the described
                      names) and shots_total
version               ``proto: 2`` is answered ``unsupported_version``, echoing the msg_id
unknown_op            an op the protocol lacks is answered ``unknown_op``
bad_request.json      a frame that is not JSON is answered ``bad_request`` with ``msg_id: ""``
bad_request.keys      a request missing ``args`` is answered ``bad_request``, echoing the msg_id
bad_request.types     ``apply`` with set-points that are not an object is ``bad_request``
bad_request.msg_id    a msg_id that is not lower-case hex is ``bad_request`` with ``msg_id: ""``
bad_request.duplicate a JSON object with a duplicate key is ``bad_request``
size_limit            a valid request padded with whitespace past 1 MiB is ``bad_request``
msg_id.reuse          a msg_id reused for another request is ``bad_request``
===================== ===========================================================================

Rules that move the rig (only with consent; every move the probe means to make is within the
described limits and steps; the refusal rules send requests a conforming rig refuses, chosen
so that a rig wrongly executing them stays as close as possible to where it is)

===================== ===========================================================================
nonfinite             NaN, Infinity, -Infinity and 1e999 in ``apply`` are ``bad_request``, and
                      nothing moves
apply                 a step of half ``max_step`` toward the middle of each set-point's range is
                      applied: the reply and ``status`` show it
apply.full_step       a step of exactly ``max_step`` is accepted
refuse.out_of_range   a value 0.1 % of a step beyond the nearest limit is ``out_of_range``, the
                      detail names the set-point, and nothing moves
refuse.step           a step of 1.5 ``max_step`` within the limits is ``out_of_range`` and nothing
                      moves
acquire               an acquisition of a few shots answers counts, the shots asked, a clock that
                      does not go back and the set-points in force; ``shots_total`` grows by the
                      shots
replay                the same acquire request sent twice gets the same reply and is executed once
                      (``shots_total`` grows once)
acquire.field         an unknown field is ``bad_request`` and nothing is acquired
safe                  ``safe`` answers the described safe set-points, and ``status`` shows them
lease.claim           ``claim`` gives the probe the lease (holder, ttl_s, expires_in_s, renewed
                      false) and a second claim renews it (renewed true); a rig that answers
                      ``unknown_op`` or ``bad_request`` has no leases (``WARN``, optional) and the
                      other lease rules are not run
lease.refuse          while the probe holds the lease, a second client's claim, apply (of the
                      values in force) and acquire are ``leased`` with ``holder`` and
                      ``expires_in_s``, and nothing is acquired; its status is answered
lease.safe            the second client's ``safe`` is executed (a person must always be able to
                      park the rig), and the lease stays with the probe
lease.release         the second client's ``release`` is ``leased``; the probe's releases it
                      (released true), after which the second client claims and releases
lease.expiry          a lease of 1 s not renewed runs out: the second client claims it 1.5 s later
===================== ===========================================================================

Then ``internal``, reported only when the rig answered a request ``internal`` during the probe
(a conforming rig never does on purpose, so the rule cannot be provoked): the probe retries that
request with the same ``msg_id``, as autotune does, and the retry must reach the rig again (a
result, or a fresh execution: the same ``msg_id`` sent with a ``status`` request is then
answered as a new request, not refused as a reuse), since an ``internal`` reply to a request
that did not complete must not be kept (:mod:`autotune.wire.protocol`, Idempotency). A lab can
exercise it with a driver that fails once on purpose.

Last, ``instance``: the optional rig identity is in every result of describe, status, apply,
acquire and safe and never changes (``WARN`` if the rig does not report one; ``FAIL`` if it
changes during the probe or is malformed).

Set-point values are compared to a millionth of the set-point's ``max_step``.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Mapping
from typing import Any


from autotune.wire import protocol
from autotune.errors import ProtocolError, RigLeased, RigRefused
from autotune.wire.protocol import Description
from autotune.kit.probe_rules import (EXPECTED, IDENTIFIED_OPS, MOVING_RULES, OCCASIONAL_RULES,
                                      PROBE_OP, RULES, SETPOINT_UNITS, STILL_RULES, Answer,
                                      Finding, Link, Outcome, number_text, raw_request,
                                      shortened)

__all__ = ["Finding", "Probe", "Link", "STILL_RULES", "MOVING_RULES", "RULES",
           "OCCASIONAL_RULES", "summarise"]


#: The probe's identities in the lease rules: the holder and a second client.
_HOLDER = "autotune probe (holder)"
_STRANGER = "autotune probe (second client)"


class _Incomplete(Exception):
    """A rule cannot continue (no reply, malformed reply); its finding is already recorded."""


class Probe:
    """Run the rules against one rig.

    Parameters
    ----------
    link : Link
        The connection to the rig.
    consent : callable
        Called once, with the rig's description, before the first rule that moves the rig;
        returns ``(True, note)`` to go on or ``(False, reason)`` to skip the moving rules.
    report : callable
        Called with each :class:`Finding` as soon as it is known.
    shots : int
        Shots of each acquisition (capped by the rig's ``max_shots_per_acquisition``).
    """

    def __init__(self, link: Link, *, consent: Callable[[Description], tuple[bool, str]],
                 report: Callable[[Finding], None], shots: int = 20) -> None:
        self._link = link
        self._consent = consent
        self._report = report
        self._shots = shots
        self.findings: list[Finding] = []
        self.description: Description | None = None
        self.moving_refused: str | None = None
        self.unreachable = False
        self._instances: list[tuple[str, object]] = []
        # The finding of the internal rule, once a request was answered internal.
        self._internal: tuple[Outcome, str] | None = None

    # ------------------------------------------------------------------ recording

    def _record(self, rule: str, outcome: Outcome, got: str = "") -> None:
        finding = Finding(rule, outcome, EXPECTED[rule], got)
        self.findings.append(finding)
        self._report(finding)

    def _pass(self, rule: str, got: str = "") -> None:
        self._record(rule, "pass", got)

    def _fail(self, rule: str, got: str) -> None:
        self._record(rule, "fail", got)

    # ------------------------------------------------------------------ exchanges

    def _send(self, data: bytes, msg_id: str, op: str | None = None) -> Answer:
        raw = self._link.exchange(data)
        if raw is None:
            return Answer(problem=f"no reply within {self._link.timeout_s:g} s")
        try:
            echoed = json.loads(raw).get("msg_id")
        except (ValueError, AttributeError, RecursionError):
            echoed = None
        try:
            result = protocol.decode_reply(raw, msg_id)
        except RigLeased as exc:
            return Answer(kind=exc.kind, detail=exc.detail, echoed=echoed, holder=exc.holder,
                           expires_in_s=exc.expires_in_s)
        except RigRefused as exc:
            return Answer(kind=exc.kind, detail=exc.detail, echoed=echoed)
        except ProtocolError as exc:
            return Answer(problem=f"a malformed reply ({shortened(str(exc))})", echoed=echoed)
        if op in IDENTIFIED_OPS:
            self._instances.append((op, result.get("instance")))
        return Answer(result=result, echoed=echoed)

    def _call(self, op: str, args: Mapping[str, Any] | None = None, *,
              client: str | None = None) -> Answer:
        msg_id = protocol.new_msg_id()
        data = raw_request(op, dict(args or {}), msg_id, client=client)
        answer = self._send(data, msg_id, op)
        if answer.kind == "internal":
            answer = self._retry_internal(data, msg_id, op, answer)
        return answer

    def _retry_internal(self, data: bytes, msg_id: str, op: str, first: Answer) -> Answer:
        """A request answered ``internal``: retry it once with its msg_id (as autotune does);
        the retry must reach the rig again. Keeps the ``internal`` rule's finding (the first
        one met) and returns the retry's answer."""
        second = self._send(data, msg_id, op)
        if second.result is not None:
            finding: tuple[Outcome, str] = (
                "pass", f"{op} answered {first.show()}; its retry was executed and answered")
        elif second.kind == "internal":
            # Failed again, or replayed from the cache? A kept reply makes the msg_id used:
            # another request under it is then refused as a reuse (or answered the old reply).
            other = "describe" if op != "describe" else "status"
            reuse = self._send(raw_request(other, {}, msg_id), msg_id, other)
            if reuse.result is not None:
                finding = ("pass", f"{op} answered internal twice; the retry was executed "
                                   f"again (the reply was not kept)")
            else:
                finding = ("fail", f"{op} answered {first.show()}; its reply was kept: the "
                                   f"retry with its msg_id got {second.show()} and {other} "
                                   f"under the same msg_id got {reuse.show()}, so a retry "
                                   f"never reaches the rig")
        else:
            return second
        if self._internal is None:
            self._internal = finding
        return second

    def _expect_error(self, rule: str, data: bytes, msg_id: str, kind: str, *, echo: str | None) -> bool:
        """Send a frame that must be refused with ``kind``; record the rule; True if it passed."""
        answer = self._send(data, msg_id)
        if answer.problem is not None:
            self._fail(rule, answer.problem)
            return False
        if answer.kind != kind:
            self._fail(rule, answer.show())
            return False
        if echo is not None and answer.echoed != echo:
            self._fail(rule, f"error {kind} with msg_id {answer.echoed!r} instead of {echo!r}")
            return False
        self._pass(rule)
        return True

    def _status(self, rule: str) -> protocol.Status:
        answer = self._call("status")
        if answer.result is None:
            self._fail(rule, f"status afterwards: {answer.show()}")
            raise _Incomplete
        try:
            status = protocol.parse_status(answer.result)
        except ProtocolError as exc:
            self._fail(rule, f"status afterwards: {exc}")
            raise _Incomplete from None
        assert self.description is not None
        missing = sorted(set(self.description.setpoints) - set(status.setpoints))
        if missing:
            self._fail(rule, f"status afterwards lacks set-points {missing}")
            raise _Incomplete
        return status

    def _close_enough(self, name: str, got: float, want: float) -> bool:
        assert self.description is not None
        return abs(got - want) <= 1e-6 * self.description.setpoints[name].max_step

    def _unchanged(self, before: Mapping[str, float], after: Mapping[str, float]) -> str:
        """"" if every set-point is where it was, else a description of what moved."""
        moved = [f"{name} {number_text(before[name])} -> {number_text(after.get(name))}" for name in before
                 if name not in after or not self._close_enough(name, after[name], before[name])]
        return ", ".join(moved)

    # ------------------------------------------------------------------ the run

    def run(self) -> list[Finding]:
        """Run every rule; return the findings (also passed to ``report`` one by one)."""
        if not self._describe():
            return self.findings
        status = self._still_rules()
        if status is None:
            self._skip_moving("status did not answer as described")
        elif status.interlock is not None:
            self._skip_moving(f"an interlock is set ({status.interlock}): nothing is moved")
        elif status.busy:
            self._skip_moving("the rig reports busy: nothing is moved")
        else:
            go, reason = self._consent(self.description)  # type: ignore[arg-type]
            if not go:
                self.moving_refused = reason
                self._skip_moving(reason)
            else:
                self._moving_rules(status)
        if self._internal is not None:
            self._record("internal", *self._internal)
        self._instance_rule()
        return self.findings

    def _skip_moving(self, reason: str) -> None:
        for rule in MOVING_RULES:
            if not any(f.rule == rule for f in self.findings):
                self._record(rule, "skip", f"not run: {reason}")

    def _describe(self) -> bool:
        answer = self._call("describe")
        if answer.result is None:
            self.unreachable = answer.problem is not None and answer.problem.startswith("no reply")
            self._fail("describe", answer.show())
            for rule in RULES[1:]:
                self._record(rule, "skip", "not run: describe failed")
            return False
        try:
            description = protocol.parse_description(answer.result)
        except ProtocolError as exc:
            self._fail("describe", str(exc))
            for rule in RULES[1:]:
                self._record(rule, "skip", "not run: describe failed")
            return False
        self.description = description
        self._pass("describe", f"rig {description.rig!r}, simulated {str(description.simulated).lower()}")
        problems = []
        for name, unit in SETPOINT_UNITS.items():
            limit = description.setpoints.get(name)
            if limit is None:
                problems.append(f"no {name}")
            elif limit.unit != unit:
                problems.append(f"{name} in {limit.unit!r}")
        extra = sorted(set(description.setpoints) - set(SETPOINT_UNITS))
        if problems:
            self._fail("describe.setpoints", ", ".join(problems))
        elif extra:
            self._record("describe.setpoints", "warn", f"also set-points this version does not name: {extra}")
        else:
            self._pass("describe.setpoints")
        problems = []
        for name, limit in description.setpoints.items():
            safe = description.safe_setpoints.get(name)
            if safe is None:
                problems.append(f"no safe value for {name}")
            elif not limit.min <= safe <= limit.max:
                problems.append(f"{name} safe {number_text(safe)} outside [{number_text(limit.min)}, {number_text(limit.max)}]")
        self._fail("describe.safe", "; ".join(problems)) if problems else self._pass("describe.safe")
        missing = [f for f in ("empty", "one_photon") if f not in description.fields]
        if missing:
            self._fail("describe.fields", f"fields {list(description.fields)}")
        else:
            self._pass("describe.fields")
        return True

    def _still_rules(self) -> protocol.Status | None:
        assert self.description is not None
        status: protocol.Status | None = None
        answer = self._call("status")
        if answer.result is None:
            self._fail("status", answer.show())
        else:
            try:
                status = protocol.parse_status(answer.result)
            except ProtocolError as exc:
                self._fail("status", str(exc))
            else:
                names = sorted(status.setpoints)
                if names != sorted(self.description.setpoints):
                    self._fail("status", f"set-points {names}, described {sorted(self.description.setpoints)}")
                    status = None
                else:
                    self._pass("status")
        msg_id = protocol.new_msg_id()
        self._expect_error("version", raw_request("status", {}, msg_id, proto=2), msg_id,
                           "unsupported_version", echo=msg_id)
        msg_id = protocol.new_msg_id()
        self._expect_error("unknown_op", raw_request(PROBE_OP, {}, msg_id), msg_id, "unknown_op", echo=msg_id)
        self._expect_error("bad_request.json", b"{\"proto\": 1, \"msg_id\": ", "", "bad_request", echo="")
        msg_id = protocol.new_msg_id()
        data = json.dumps({"proto": 1, "msg_id": msg_id, "op": "status"}).encode()
        self._expect_error("bad_request.keys", data, msg_id, "bad_request", echo=msg_id)
        msg_id = protocol.new_msg_id()
        self._expect_error("bad_request.types", raw_request("apply", {"setpoints": "fast"}, msg_id), msg_id,
                           "bad_request", echo=msg_id)
        data = raw_request("status", {}, "NOT-HEX")
        self._expect_error("bad_request.msg_id", data, "", "bad_request", echo="")
        msg_id = protocol.new_msg_id()
        data = (f'{{"proto": 1, "proto": 1, "msg_id": "{msg_id}", "op": "status", "args": {{}}}}').encode()
        self._expect_error("bad_request.duplicate", data, msg_id, "bad_request", echo=None)
        msg_id = protocol.new_msg_id()
        data = raw_request("status", {}, msg_id) + b" " * (protocol.MAX_MESSAGE_BYTES + 16)
        self._expect_error("size_limit", data, msg_id, "bad_request", echo=None)
        msg_id = protocol.new_msg_id()
        first = self._send(raw_request("status", {}, msg_id), msg_id, "status")
        if first.result is None:
            self._fail("msg_id.reuse", f"the first use: {first.show()}")
        else:
            self._expect_error("msg_id.reuse", raw_request("describe", {}, msg_id), msg_id, "bad_request",
                               echo=None)
        return status

    # ------------------------------------------------------------------ moving rules

    def _moving_rules(self, status: protocol.Status) -> None:
        for rule in (self._rule_nonfinite, self._rule_apply, self._rule_refusals, self._rule_acquire,
                     self._rule_safe):
            try:
                rule()
            except _Incomplete:
                pass
        try:
            self._lease_rules()
        except _Incomplete:
            pass
        finally:
            # Whatever happened, the probe leaves no lease behind.
            for client in (_HOLDER, _STRANGER):
                self._call("release", client=client)
        self._skip_moving("an earlier rule could not finish")

    # ------------------------------------------------------------------ lease rules

    def _claim(self, rule: str, client: str, ttl_s: float, *, renewed: bool) -> None:
        """A claim that must be granted to ``client``; records a failure and stops otherwise."""
        answer = self._call("claim", {"ttl_s": ttl_s}, client=client)
        if answer.result is None:
            self._fail(rule, f"claim by {client!r}: {answer.show()}")
            raise _Incomplete
        try:
            lease = protocol.parse_claim(answer.result)
        except ProtocolError as exc:
            self._fail(rule, f"claim by {client!r}: {exc}")
            raise _Incomplete from None
        if lease.holder != client or lease.renewed is not renewed or not 0 < lease.expires_in_s <= ttl_s:
            self._fail(rule, f"claim by {client!r}: holder {lease.holder!r}, renewed "
                             f"{str(lease.renewed).lower()}, expires_in_s {number_text(lease.expires_in_s)} "
                             f"(ttl_s {number_text(ttl_s)})")
            raise _Incomplete

    def _leased(self, answer: Answer, what: str) -> str:
        """"" if ``answer`` is a proper ``leased`` refusal naming the probe's holder, else why not."""
        if answer.kind != "leased":
            return f"{what}: {answer.show()}"
        if answer.holder != _HOLDER or answer.expires_in_s is None or answer.expires_in_s <= 0:
            return (f"{what}: leased, but holder {answer.holder!r} and expires_in_s "
                    f"{number_text(answer.expires_in_s)} (expected {_HOLDER!r} and a time > 0)")
        return ""

    def _lease_rules(self) -> None:
        assert self.description is not None
        first = self._call("claim", {"ttl_s": 30.0}, client=_HOLDER)
        if first.kind in ("unknown_op", "bad_request"):
            self._record("lease.claim", "warn", f"no leases ({first.show()}): a second client "
                                                f"can move this rig while autotune runs")
            for rule in ("lease.refuse", "lease.safe", "lease.release", "lease.expiry"):
                self._record(rule, "skip", "not run: the rig has no leases")
            return
        self._call("release", client=_HOLDER)
        self._claim("lease.claim", _HOLDER, 30.0, renewed=False)
        self._claim("lease.claim", _HOLDER, 30.0, renewed=True)
        self._pass("lease.claim")

        before = self._in_force("lease.refuse")
        values = {name: before.setpoints[name] for name in self.description.setpoints}
        shots = min(self._shots, self.description.max_shots_per_acquisition)
        problems = [
            self._leased(self._call("claim", {"ttl_s": 30.0}, client=_STRANGER), "its claim"),
            self._leased(self._call("apply", {"setpoints": values}, client=_STRANGER), "its apply"),
            self._leased(self._call("acquire", {"field": "empty", "ramsey_phase": 0.0,
                                                "shots": shots}, client=_STRANGER), "its acquire"),
            self._leased(self._call("acquire", {"field": "empty", "ramsey_phase": 0.0,
                                                "shots": shots}), "an acquire without client"),
        ]
        answer = self._call("status", client=_STRANGER)
        if answer.result is None:
            problems.append(f"its status: {answer.show()}")
        grown = self._in_force("lease.refuse").shots_total - before.shots_total
        if grown:
            problems.append(f"shots_total grew by {grown}")
        problems = [p for p in problems if p]
        self._fail("lease.refuse", "; ".join(problems)) if problems else self._pass("lease.refuse")

        answer = self._call("safe", client=_STRANGER)
        if answer.result is None:
            self._fail("lease.safe", f"its safe: {answer.show()}")
        else:
            shown = self._unchanged(dict(self.description.safe_setpoints),
                                    dict(self._in_force("lease.safe").setpoints))
            still = self._leased(self._call("claim", {"ttl_s": 30.0}, client=_STRANGER),
                                 "its claim after the safe")
            if shown:
                self._fail("lease.safe", f"status differs from safe_setpoints: {shown}")
            elif still:
                self._fail("lease.safe", still)
            else:
                self._pass("lease.safe")

        problem = self._leased(self._call("release", client=_STRANGER), "its release")
        answer = self._call("release", client=_HOLDER)
        if not problem and (answer.result is None or answer.result.get("released") is not True):
            problem = f"the holder's release: {answer.show()}, {answer.result!r}"
        if problem:
            self._fail("lease.release", problem)
        else:
            self._claim("lease.release", _STRANGER, 30.0, renewed=False)
            answer = self._call("release", client=_STRANGER)
            if answer.result is None or answer.result.get("released") is not True:
                self._fail("lease.release", f"the second client's release: {answer.show()}")
            else:
                self._pass("lease.release")

        self._claim("lease.expiry", _HOLDER, 1.0, renewed=False)
        time.sleep(1.5)
        self._claim("lease.expiry", _STRANGER, 30.0, renewed=False)
        self._call("release", client=_STRANGER)
        self._pass("lease.expiry")

    def _in_force(self, rule: str) -> protocol.Status:
        return self._status(rule)

    def _rule_nonfinite(self) -> None:
        assert self.description is not None
        before = self._in_force("nonfinite")
        name = next(iter(self.description.setpoints))
        wrong = []
        for token in ("NaN", "Infinity", "-Infinity", "1e999"):
            msg_id = protocol.new_msg_id()
            data = (f'{{"proto": 1, "msg_id": "{msg_id}", "op": "apply", '
                    f'"args": {{"setpoints": {{"{name}": {token}}}}}}}').encode()
            answer = self._send(data, msg_id)
            if answer.kind != "bad_request":
                wrong.append(f"{token}: {answer.show()}")
        after = self._in_force("nonfinite")
        moved = self._unchanged(before.setpoints, after.setpoints)
        if wrong or moved:
            self._fail("nonfinite", "; ".join(wrong + ([f"moved {moved}"] if moved else [])))
        else:
            self._pass("nonfinite")

    def _apply(self, rule: str, name: str, value: float) -> bool:
        answer = self._call("apply", {"setpoints": {name: value}})
        if answer.result is None:
            self._fail(rule, f"{name} {number_text(value)}: {answer.show()}")
            return False
        try:
            applied = protocol.parse_applied(answer.result)
        except ProtocolError as exc:
            self._fail(rule, str(exc))
            return False
        reported = applied.setpoints.get(name)
        if reported is None or not self._close_enough(name, reported, value):
            self._fail(rule, f"{name} {number_text(value)} sent, the reply says {number_text(reported)}")
            return False
        shown = self._in_force(rule).setpoints.get(name)
        if shown is None or not self._close_enough(name, shown, value):
            self._fail(rule, f"{name} {number_text(value)} applied, status says {number_text(shown)}")
            return False
        return True

    def _rule_apply(self) -> None:
        assert self.description is not None
        start = self._in_force("apply").setpoints
        moved: list[str] = []
        for name, limit in self.description.setpoints.items():
            current = start.get(name)
            if current is None or not limit.min <= current <= limit.max:
                self._fail("apply", f"{name} in force {number_text(current)} is outside its limits "
                                    f"[{number_text(limit.min)}, {number_text(limit.max)}]; not moved")
                raise _Incomplete
            upward = current <= 0.5 * (limit.min + limit.max)
            room = (limit.max - current) if upward else (current - limit.min)
            step = min(0.5 * limit.max_step, room)
            if step <= 0:
                continue
            target = current + step if upward else current - step
            if not self._apply("apply", name, target):
                raise _Incomplete
            moved.append(f"{name} {number_text(current)} -> {number_text(target)}")
        if moved:
            self._pass("apply", "; ".join(moved))
        else:
            self._record("apply", "skip", "not run: every range is a single point")

        here = self._in_force("apply.full_step").setpoints
        full: list[str] = []
        for name, limit in self.description.setpoints.items():
            room_up, room_down = limit.max - here[name], here[name] - limit.min
            if max(room_up, room_down) < limit.max_step:
                continue
            value = here[name] + limit.max_step if room_up >= room_down else here[name] - limit.max_step
            if not self._apply("apply.full_step", name, value):
                return
            full.append(f"{name} {number_text(here[name])} -> {number_text(value)}")
        if full:
            self._pass("apply.full_step", "; ".join(full))
        else:
            self._record("apply.full_step", "skip", "not run: every range is narrower than max_step")

    def _rule_refusals(self) -> None:
        assert self.description is not None
        before = self._in_force("refuse.out_of_range").setpoints
        # The limit nearest to where the rig is, in steps: a rig wrongly executing the request
        # then moves the least.
        nearest = min(
            ((min(limit.max - before[n], before[n] - limit.min) / limit.max_step, n)
             for n, limit in self.description.setpoints.items()),
        )[1]
        limit = self.description.setpoints[nearest]
        up = (limit.max - before[nearest]) <= (before[nearest] - limit.min)
        value = limit.max + 1e-3 * limit.max_step if up else limit.min - 1e-3 * limit.max_step
        self._refusal("refuse.out_of_range", nearest, value, before)

        before = self._in_force("refuse.step").setpoints
        for name, limit in self.description.setpoints.items():
            current = before[name]
            for value in (current + 1.5 * limit.max_step, current - 1.5 * limit.max_step):
                if limit.min <= value <= limit.max:
                    self._refusal("refuse.step", name, value, before)
                    return
        self._record("refuse.step", "skip", "not run: no range has room for a step of 1.5 max_step")

    def _refusal(self, rule: str, name: str, value: float, before: Mapping[str, float]) -> None:
        answer = self._call("apply", {"setpoints": {name: value}})
        after = self._in_force(rule).setpoints
        moved = self._unchanged(before, after)
        if answer.kind != "out_of_range":
            self._fail(rule, f"{name} {number_text(value)}: {answer.show()}" + (f"; moved {moved}" if moved else ""))
        elif name not in answer.detail:
            self._fail(rule, f"out_of_range whose detail does not name {name}: {shortened(answer.detail)}")
        elif moved:
            self._fail(rule, f"out_of_range, but moved {moved}")
        else:
            self._pass(rule, f"{name} {number_text(value)}: {shortened(answer.detail, 90)}")

    def _rule_acquire(self) -> None:
        assert self.description is not None
        shots = max(1, min(self._shots, self.description.max_shots_per_acquisition))
        args = {"field": "empty", "ramsey_phase": 0.0, "shots": shots}
        before = self._in_force("acquire")
        answer = self._call("acquire", args)
        if answer.result is None:
            self._fail("acquire", answer.show())
            raise _Incomplete
        try:
            acquisition = protocol.parse_acquisition(answer.result)
        except ProtocolError as exc:
            self._fail("acquire", str(exc))
            raise _Incomplete from None
        after = self._in_force("acquire")
        problems = []
        if acquisition.shots != shots:
            problems.append(f"shots {acquisition.shots} for {shots} asked")
        if acquisition.t_start < before.clock:
            problems.append(f"t_start {number_text(acquisition.t_start)} before the clock {number_text(before.clock)}")
        moved = self._unchanged(before.setpoints, acquisition.setpoints)
        if moved:
            problems.append(f"set-points in force differ from status: {moved}")
        if after.shots_total != before.shots_total + shots:
            problems.append(f"shots_total {before.shots_total} -> {after.shots_total} for {shots} shots")
        if problems:
            self._fail("acquire", "; ".join(problems))
        else:
            counts = acquisition.counts
            self._pass("acquire", f"{shots} shots: e {counts.e}, g {counts.g}, i {counts.i}")

        msg_id = protocol.new_msg_id()
        data = raw_request("acquire", args, msg_id)
        first = self._send(data, msg_id, "acquire")
        second = self._send(data, msg_id, "acquire")
        total = self._in_force("replay").shots_total
        grown = total - after.shots_total
        if first.result is None or second.result is None:
            self._fail("replay", f"first {first.show()}, second {second.show()}")
        elif first.result != second.result:
            self._fail("replay", f"two different replies (t_start {first.result.get('t_start')!r} and "
                                 f"{second.result.get('t_start')!r}); shots_total grew by {grown}")
        elif grown != shots:
            self._fail("replay", f"shots_total grew by {grown} for one request of {shots} shots")
        else:
            self._pass("replay")

        answer = self._call("acquire", {"field": "vacuum", "ramsey_phase": 0.0, "shots": shots})
        grown = self._in_force("acquire.field").shots_total - total
        if answer.kind != "bad_request" or grown:
            self._fail("acquire.field", answer.show() + (f"; shots_total grew by {grown}" if grown else ""))
        else:
            self._pass("acquire.field")

    def _rule_safe(self) -> None:
        assert self.description is not None
        answer = self._call("safe")
        if answer.result is None:
            self._fail("safe", answer.show())
            return
        try:
            applied = protocol.parse_safe(answer.result)
        except ProtocolError as exc:
            self._fail("safe", str(exc))
            return
        want = dict(self.description.safe_setpoints)
        moved = self._unchanged(want, dict(applied.setpoints))
        shown = self._unchanged(want, dict(self._in_force("safe").setpoints))
        if moved:
            self._fail("safe", f"the reply differs from safe_setpoints: {moved}")
        elif shown:
            self._fail("safe", f"status differs from safe_setpoints: {shown}")
        else:
            self._pass("safe")

    def _instance_rule(self) -> None:
        seen = {value for _, value in self._instances}
        if not self._instances:
            self._record("instance", "skip", "not run: no result seen")
        elif seen == {None}:
            self._record("instance", "warn", "no instance key (optional; a client then cannot see a restart)")
        elif None in seen:
            ops = sorted({op for op, value in self._instances if value is None})
            self._fail("instance", f"missing from {ops} but present elsewhere")
        elif len(seen) > 1:
            self._fail("instance", f"changed during the probe: {sorted(str(v) for v in seen)}")
        else:
            value = next(iter(seen))
            if not isinstance(value, str) or not 1 <= len(value) <= 64 or not all(
                    c.isascii() and (c.isalnum() or c in "_-") for c in value):
                self._fail("instance", f"malformed {number_text(value)}")
            else:
                self._pass("instance", value)


def summarise(findings: list[Finding]) -> dict[str, int]:
    """Count findings per outcome."""
    counts = {"pass": 0, "fail": 0, "warn": 0, "skip": 0}
    for finding in findings:
        counts[finding.outcome] += 1
    return counts

