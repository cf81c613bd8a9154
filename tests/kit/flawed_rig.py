"""A deliberately non-conforming rig server, for the probe to catch (run as a script).

It serves the example lab driver through the generic server with exactly one flaw:

``replays_nothing``        a repeated msg_id is executed again (no replay cache)
``accepts_nan``            NaN and infinities are read as numbers instead of refused as bad JSON
``unknown_op_bad_request`` an unknown op is answered bad_request instead of unknown_op
``ignores_steps``          a set-point step larger than max_step is applied
``no_instance``            results carry no rig identity (allowed: the probe only warns)
``keeps_internal``         its driver fails once, on the first acquisition, and the server keeps
                           that ``internal`` reply (a retry never reaches the driver again)
``fails_once``             no flaw of the server: its driver fails once, on the first
                           acquisition (a conforming server answers the retry afresh)
``no_lease``               a rig of the protocol's first edition: no claim, and the request key
                           ``client`` refused as unknown (allowed: the probe only warns)
``ignores_lease``          claims are granted, but other clients' moves and acquisitions executed

Usage: ``python flawed_rig.py FLAW READY_FILE``; it listens on a free loopback port, writes the
endpoint to READY_FILE and serves until SIGTERM.
"""

from __future__ import annotations

import dataclasses
import json
import signal
import sys
import types
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO / "examples"))

from lab_driver.driver import LabDriver  # noqa: E402

from autotune.wire import protocol  # noqa: E402
from autotune.kit.channels import ChannelMap  # noqa: E402
from autotune.kit.driver_config import load_driver_config  # noqa: E402
from autotune.wire.protocol import ErrorKind, Op, RequestRejected  # noqa: E402
from autotune.kit.served import ServedDriver  # noqa: E402
from autotune.kit.server import FaultConfig, RigServer, write_ready_file  # noqa: E402

FLAWS = ("replays_nothing", "accepts_nan", "unknown_op_bad_request", "ignores_steps", "no_instance",
         "keeps_internal", "fails_once", "no_lease", "ignores_lease")


class _Server(RigServer):
    def __init__(self, flaw: str, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._flaw = flaw

    def _remember(self, msg_id: str, digest: bytes, reply: bytes) -> None:
        if self._flaw != "replays_nothing":
            super()._remember(msg_id, digest, reply)

    def _execute(self, request: Any) -> tuple[bytes, bool]:
        reply, kept = super()._execute(request)
        return reply, kept or self._flaw == "keeps_internal"

    def _identified(self, result: Any) -> dict[str, Any]:
        return dict(result) if self._flaw == "no_instance" else super()._identified(result)

    def _handle(self, payload: bytes) -> tuple[bytes, bool]:
        if self._flaw == "accepts_nan":
            try:
                message = json.loads(payload)  # Python's json reads NaN and Infinity
                request = protocol.Request(message["msg_id"], Op(message["op"]),
                                           types.MappingProxyType(message["args"]))
            except (ValueError, KeyError, TypeError):
                pass
            else:
                setpoints = request.args.get("setpoints")
                if (request.op is Op.APPLY and isinstance(setpoints, dict) and setpoints
                        and all(isinstance(v, float) for v in setpoints.values())):
                    return self._execute(request)[0], False
        if self._flaw == "unknown_op_bad_request":
            try:
                protocol.decode_request(payload)
            except RequestRejected as exc:
                if exc.kind is ErrorKind.UNKNOWN_OP:
                    return protocol.encode_error(exc.msg_id, ErrorKind.BAD_REQUEST, exc.detail), False
        if self._flaw == "no_lease":
            try:
                message = json.loads(payload)
            except ValueError:
                message = None
            if isinstance(message, dict) and "client" in message:
                return protocol.encode_error(str(message.get("msg_id", "")), ErrorKind.BAD_REQUEST,
                                             "request: unknown key 'client'"), False
        return super()._handle(payload)

    def _lease_gate(self, request: protocol.Request) -> Any:
        if self._flaw == "ignores_lease" and request.op not in (Op.CLAIM, Op.RELEASE):
            return None
        return super()._lease_gate(request)


class _StepBlind(ServedDriver):
    """Checks limits but not steps."""

    def apply(self, setpoints: Any) -> dict[str, Any]:
        strict = self._map
        self._map = ChannelMap({n: dataclasses.replace(m, max_step=1e300, channel_max_step=None)
                                for n, m in strict.setpoints.items()})
        try:
            return super().apply(setpoints)
        finally:
            self._map = strict


class _FailsOnce(LabDriver):
    """The example driver, failing on its first acquisition (before acquiring anything)."""

    failed = False

    def acquire(self, field: str, ramsey_phase: float, shots: int) -> Any:
        if not self.failed:
            self.failed = True
            raise RuntimeError("the sequencer dropped its trigger (on purpose, once)")
        return super().acquire(field, ramsey_phase, shots)


def main() -> int:
    flaw, ready = sys.argv[1], Path(sys.argv[2])
    if flaw not in FLAWS:
        print(f"unknown flaw {flaw!r}; expected one of {FLAWS}", file=sys.stderr)
        return 2
    config = load_driver_config(REPO / "examples" / "lab_driver" / "DRIVER.toml")
    driver_class = _FailsOnce if flaw in ("keeps_internal", "fails_once") else LabDriver
    driver = driver_class(**config.options)
    served_class = _StepBlind if flaw == "ignores_steps" else ServedDriver
    served = served_class(driver, config.setpoints, source=str(config.path))
    server = _Server(flaw, served, "tcp://127.0.0.1:0", faults=FaultConfig())
    try:
        write_ready_file(ready, server.start())
        signal.signal(signal.SIGTERM, lambda *_: server.stop())
        server.serve()
    finally:
        server.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
